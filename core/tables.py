"""Results tables: ECSV, CSV, JSON and LaTeX (AASTeX deluxetable, tabular).

One measured galaxy is one :class:`ResultRow`. A row becomes a one-row
:class:`astropy.table.Table` whose columns carry units and whose ``meta``
records the inputs with their SHA-256 checksums, the software versions,
every setting of the session and the random seed. Several rows (several
galaxies, or several results files merged with :func:`merge_results`) make
one paper table.

File formats
------------
* ECSV (``.ecsv``): the table with units and full metadata (astropy's
  Enhanced Character Separated Values, YAML header).
* CSV (``.csv``): the same columns, no units or metadata (for spreadsheets).
* JSON (``.json``): for scripts; layout ``gyrometer-results`` version
  :data:`RESULTS_SCHEMA_VERSION`, documented in :func:`results_to_json`.
* LaTeX (``.tex``): :func:`latex_table` in two styles, an AASTeX
  ``deluxetable`` and a plain ``tabular``.

Rounding
--------
Values with uncertainties are rounded with the rule of the Particle Data
Group (Review of Particle Physics, "Introduction", section "Rounding"; e.g.
Workman et al. 2022, PTEP 2022, 083C01): take the three highest-order
digits of the uncertainty; if they lie in 100-354 keep two significant
digits, in 355-949 keep one, in 950-999 round the uncertainty up to 1000
and keep two. The value is rounded to the same decimal place. For
asymmetric errors the smaller of the two sets the place (common practice).
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from decimal import ROUND_DOWN, ROUND_HALF_UP, Decimal
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np

from .errors import InputFileError, OutputError
from .safeio import atomic_output, write_text_atomic

__all__ = [
    "RESULTS_SCHEMA",
    "RESULTS_SCHEMA_VERSION",
    "Estimate",
    "ResultRow",
    "COLUMNS",
    "software_versions",
    "pdg_decimal_place",
    "round_to_uncertainty",
    "format_value_error",
    "result_table",
    "rows_table",
    "write_ecsv",
    "write_csv",
    "results_to_json",
    "write_json",
    "read_results",
    "merge_results",
    "latex_table",
    "write_latex",
]

#: Name and version of the JSON / ECSV-meta layout of a results file.
RESULTS_SCHEMA = "gyrometer-results"
RESULTS_SCHEMA_VERSION = 1


@dataclass(frozen=True)
class Estimate:
    """A value with (possibly asymmetric) 1-sigma errors.

    Attributes
    ----------
    value : float
        Central value (the median of Monte Carlo draws, or a best fit).
    plus, minus : float
        Upper and lower 1-sigma errors, both positive (84th - median and
        median - 16th percentile for Monte Carlo results). NaN when unknown.
    """

    value: float
    plus: float = float("nan")
    minus: float = float("nan")

    @classmethod
    def from_draws(cls, draws: Any) -> "Estimate":
        """Median with 16th/84th-percentile errors of finite draws."""
        d = np.asarray(draws, dtype=float)
        d = d[np.isfinite(d)]
        if d.size == 0:
            return cls.missing()
        p16, p50, p84 = np.percentile(d, [15.865525393145708, 50.0,
                                          84.13447460685429])
        return cls(float(p50), float(p84 - p50), float(p50 - p16))

    @classmethod
    def missing(cls) -> "Estimate":
        nan = float("nan")
        return cls(nan, nan, nan)

    def scaled(self, factor: float) -> "Estimate":
        """All three numbers times a positive ``factor``."""
        return Estimate(self.value * factor, self.plus * factor,
                        self.minus * factor)

    @property
    def is_missing(self) -> bool:
        return not math.isfinite(self.value)


def _nan() -> Estimate:
    return Estimate.missing()


@dataclass(frozen=True)
class ResultRow:
    """One galaxy's measurement, as it appears in a paper table.

    Attributes
    ----------
    galaxy : str
    tracer : str
        Tracer of the kinematics (``"stars"``, ``"ionised gas"`` ...).
    route : str
        ``"maps"``, ``"cube"`` or ``"absorption"`` (slit spectra of an
        absorption-line cube).
    distance_mpc, inc_deg, pa_deg, vsys_kms : float
        Adopted geometry (NaN distance when none was given).
    n_slits : int
        Slits used in the fit.
    omega_p_arcsec : Estimate
        Pattern speed, km/s/arcsec (Monte Carlo median and percentiles).
    omega_p_kpc : Estimate
        Pattern speed, km/s/kpc (needs a distance).
    omega_p_fit_arcsec, omega_p_fit_err_arcsec : float
        Best-fit slope / sin i and its fit-only error, km/s/arcsec.
    reduced_chi2 : float
        Of the straight-line fit.
    r_cr_arcsec, r_cr_kpc : Estimate
        Corotation radius.
    r_bar_arcsec, r_bar_kpc : Estimate
        Deprojected bar half-length.
    rate : Estimate
        R = R_CR / R_bar (dimensionless).
    rate_class : str
        ``"ultrafast"``, ``"fast"``, ``"slow"`` or ``""``.
    """

    galaxy: str
    tracer: str = "other"
    route: str = "maps"
    distance_mpc: float = float("nan")
    inc_deg: float = float("nan")
    pa_deg: float = float("nan")
    vsys_kms: float = float("nan")
    n_slits: int = 0
    omega_p_arcsec: Estimate = field(default_factory=_nan)
    omega_p_kpc: Estimate = field(default_factory=_nan)
    omega_p_fit_arcsec: float = float("nan")
    omega_p_fit_err_arcsec: float = float("nan")
    reduced_chi2: float = float("nan")
    r_cr_arcsec: Estimate = field(default_factory=_nan)
    r_cr_kpc: Estimate = field(default_factory=_nan)
    r_bar_arcsec: Estimate = field(default_factory=_nan)
    r_bar_kpc: Estimate = field(default_factory=_nan)
    rate: Estimate = field(default_factory=_nan)
    rate_class: str = ""


#: Scalar columns of a results table: (name, unit, description).
_SCALAR_COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("galaxy", "", "Galaxy name"),
    ("tracer", "", "Kinematic tracer"),
    ("route", "", "Input route (maps, cube or absorption)"),
    ("distance_mpc", "Mpc", "Adopted distance"),
    ("inc_deg", "deg", "Adopted inclination"),
    ("pa_deg", "deg", "Position angle of the receding line of nodes, N through E"),
    ("vsys_kms", "km / s", "Adopted systemic velocity"),
    ("n_slits", "", "Number of slits in the fit"),
)
#: Estimate columns: (field name, unit, description); each gives three
#: table columns ``<name>``, ``<name>_plus``, ``<name>_minus``.
_ESTIMATE_COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("omega_p_arcsec", "km / (arcsec s)", "Pattern speed"),
    ("omega_p_kpc", "km / (kpc s)", "Pattern speed"),
    ("r_cr_arcsec", "arcsec", "Corotation radius"),
    ("r_cr_kpc", "kpc", "Corotation radius"),
    ("r_bar_arcsec", "arcsec", "Deprojected bar half-length"),
    ("r_bar_kpc", "kpc", "Deprojected bar half-length"),
    ("rate", "", "R = R_CR / R_bar"),
)
_TAIL_COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("rate_class", "", "Bar rotation class from R"),
    ("omega_p_fit_arcsec", "km / (arcsec s)", "Best-fit pattern speed (slope / sin i)"),
    ("omega_p_fit_err_arcsec", "km / (arcsec s)", "Fit-only error of the best-fit pattern speed"),
    ("reduced_chi2", "", "Reduced chi-square of the line fit"),
)


def _all_columns() -> tuple[tuple[str, str, str], ...]:
    cols = list(_SCALAR_COLUMNS)
    for name, unit, desc in _ESTIMATE_COLUMNS:
        cols.append((name, unit, desc))
        cols.append((name + "_plus", unit, desc + ", upper 1-sigma error"))
        cols.append((name + "_minus", unit, desc + ", lower 1-sigma error"))
    cols.extend(_TAIL_COLUMNS)
    return tuple(cols)


#: Every column of a results table, in order: (name, unit, description).
COLUMNS = _all_columns()
_TEXT_COLUMNS = {"galaxy", "tracer", "route", "rate_class"}
_INT_COLUMNS = {"n_slits"}


def software_versions() -> dict[str, str]:
    """Versions of Python and of the libraries a result depends on."""
    import platform

    import astropy
    import scipy

    from . import __version__

    versions = {"gyrometer": __version__, "python": platform.python_version(),
                "numpy": np.__version__, "scipy": scipy.__version__,
                "astropy": astropy.__version__}
    try:  # optional for tables, needed for figures and regions
        import matplotlib
        versions["matplotlib"] = matplotlib.__version__
    except ImportError:  # pragma: no cover - declared dependency
        pass
    try:
        import regions
        versions["regions"] = regions.__version__
    except ImportError:  # pragma: no cover - declared dependency
        pass
    return versions


def _row_values(row: ResultRow) -> dict[str, Any]:
    values: dict[str, Any] = {}
    for name, _, _ in _SCALAR_COLUMNS:
        values[name] = getattr(row, name)
    for name, _, _ in _ESTIMATE_COLUMNS:
        est: Estimate = getattr(row, name)
        values[name] = float(est.value)
        values[name + "_plus"] = float(est.plus)
        values[name + "_minus"] = float(est.minus)
    for name, _, _ in _TAIL_COLUMNS:
        values[name] = getattr(row, name)
    return values


def rows_table(rows: Sequence[ResultRow], meta: dict | None = None):
    """An :class:`astropy.table.Table` with one row per :class:`ResultRow`.

    Columns and units are those of :data:`COLUMNS`; ``meta`` (a JSON-like
    dict) is stored under ``table.meta["gyrometer"]``.
    """
    from astropy.table import Column, Table

    values = [_row_values(r) for r in rows]
    table = Table()
    for name, unit, desc in COLUMNS:
        data = [v[name] for v in values]
        if name in _TEXT_COLUMNS:
            col = Column([str(d) for d in data], name=name, dtype=str,
                         description=desc)
        elif name in _INT_COLUMNS:
            col = Column(np.array(data, dtype=np.int64), name=name,
                         description=desc)
        else:
            col = Column(np.array(data, dtype=float), name=name,
                         unit=unit or None, description=desc)
        table.add_column(col)
    table.meta["gyrometer"] = dict(meta or {})
    table.meta["gyrometer"].setdefault("schema", RESULTS_SCHEMA)
    table.meta["gyrometer"].setdefault("schema_version", RESULTS_SCHEMA_VERSION)
    return table


def result_table(row: ResultRow, *, inputs: Sequence[dict] = (),
                 settings: dict | None = None, seed: int | None = None,
                 extra: dict | None = None):
    """One-row results table with full metadata.

    Parameters
    ----------
    row : ResultRow
    inputs : sequence of dict
        One ``{"role", "path", "sha256"}`` mapping per input file.
    settings : dict
        Every setting of the session (the session's own dict form).
    seed : int
        Seed of the Monte Carlo generator.
    extra : dict
        Further JSON-like details (budget terms, slits, resonances,
        warnings), stored under ``meta["gyrometer"]["details"]``.
    """
    meta = {"schema": RESULTS_SCHEMA,
            "schema_version": RESULTS_SCHEMA_VERSION,
            "galaxy": row.galaxy,
            "software": software_versions(),
            "inputs": [dict(i) for i in inputs],
            "settings": _jsonable(settings or {}),
            "seed": None if seed is None else int(seed),
            "rounding": "Particle Data Group rule (Review of Particle Physics, "
                        "Introduction, 'Rounding')"}
    if extra:
        meta["details"] = _jsonable(extra)
    return rows_table([row], meta)


def _jsonable(obj: Any) -> Any:
    """Plain JSON/YAML-safe copy: tuples -> lists, numpy scalars -> Python."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        value = float(obj)
        return value if math.isfinite(value) else None
    if obj is None or isinstance(obj, (int, str)):
        return obj
    return str(obj)


# -- writers ------------------------------------------------------------------
def write_ecsv(table, path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Write ``table`` as ECSV (units and metadata kept), atomically."""
    with atomic_output(path, overwrite, suffix=".ecsv") as tmp:
        table.write(tmp, format="ascii.ecsv")
    return Path(path)


def write_csv(table, path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Write ``table`` as plain CSV (no units, no metadata), atomically."""
    with atomic_output(path, overwrite, suffix=".csv") as tmp:
        table.write(tmp, format="ascii.csv")
    return Path(path)


def results_to_json(table) -> str:
    """JSON text of a results table (layout ``gyrometer-results`` v1).

    Layout::

        {
          "schema": "gyrometer-results",
          "schema_version": 1,
          "columns": [{"name": ..., "unit": ..., "description": ...}, ...],
          "rows": [{"galaxy": "LBDP-011", "omega_p_kpc": 41.2, ...}, ...],
          "meta": {"software": {...}, "inputs": [{"role", "path", "sha256"}],
                   "settings": {...}, "seed": 20261201, "details": {...}}
        }

    ``rows`` hold one object per galaxy with the columns of :data:`COLUMNS`;
    missing numbers are ``null``. Units are those listed in ``columns``.

    Additions within version 1 (keys were only added, so readers of the
    first layout keep working): ``route`` may be ``"absorption"``;
    ``meta.details`` may hold ``route``, ``radial`` (annulus edges and
    Omega_p(R) with errors, resolution, regularisation, lam; see
    :func:`gyrometer.core.pipeline.radial_details`), ``absorption``
    (template, settings and one entry per slit spectrum fit) and
    ``rotation_curve_flagged`` (radii of rings left out of the model and
    why).
    """
    meta = dict(table.meta.get("gyrometer", {}))
    meta.pop("schema", None)
    meta.pop("schema_version", None)
    columns = [{"name": c.name, "unit": "" if c.unit is None else str(c.unit),
                "description": c.description or ""}
               for c in table.itercols()]
    rows = [{c.name: _jsonable(table[c.name][i].item()
                               if hasattr(table[c.name][i], "item")
                               else table[c.name][i])
             for c in table.itercols()} for i in range(len(table))]
    doc = {"schema": RESULTS_SCHEMA, "schema_version": RESULTS_SCHEMA_VERSION,
           "columns": columns, "rows": rows, "meta": _jsonable(meta)}
    return json.dumps(doc, indent=2, allow_nan=False) + "\n"


def write_json(table, path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Write :func:`results_to_json` of ``table`` atomically."""
    return write_text_atomic(path, results_to_json(table), overwrite)


# -- readers ------------------------------------------------------------------
def _table_from_json(path: Path):
    from astropy.table import Column, Table

    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputFileError(f"not a readable JSON results file ({exc})",
                             path=str(path)) from exc
    if not isinstance(doc, dict) or doc.get("schema") != RESULTS_SCHEMA:
        raise InputFileError(f"not a {RESULTS_SCHEMA} file", path=str(path),
                             keyword="schema")
    version = doc.get("schema_version")
    if version != RESULTS_SCHEMA_VERSION:
        raise InputFileError(
            f"results schema version {version!r} is not supported "
            f"(this Gyrometer reads version {RESULTS_SCHEMA_VERSION})",
            path=str(path), keyword="schema_version",
            hint="re-export the results with this version of Gyrometer")
    table = Table()
    for spec in doc["columns"]:
        name = spec["name"]
        data = [r.get(name) for r in doc["rows"]]
        if name in _TEXT_COLUMNS:
            col = Column([str(d) for d in data], name=name, dtype=str)
        elif name in _INT_COLUMNS:
            col = Column(np.array(data, dtype=np.int64), name=name)
        else:
            col = Column(np.array([np.nan if d is None else d for d in data],
                                  dtype=float), name=name,
                         unit=spec.get("unit") or None)
        col.description = spec.get("description", "")
        table.add_column(col)
    meta = dict(doc.get("meta", {}))
    meta["schema"] = RESULTS_SCHEMA
    meta["schema_version"] = RESULTS_SCHEMA_VERSION
    table.meta["gyrometer"] = meta
    return table


def read_results(path: str | os.PathLike):
    """Read a results file written by Gyrometer (ECSV, JSON or CSV).

    Raises
    ------
    InputFileError
        If the file is missing, unreadable, of another schema or lacks the
        results columns.
    """
    from astropy.table import Table

    p = Path(path)
    if not p.is_file():
        raise InputFileError("results file not found", path=str(p))
    suffix = p.suffix.lower()
    if suffix == ".json":
        table = _table_from_json(p)
    else:
        fmt = {".ecsv": "ascii.ecsv", ".csv": "ascii.csv"}.get(suffix)
        if fmt is None:
            raise InputFileError("unknown results format (use .ecsv, .json "
                                 "or .csv)", path=str(p))
        try:
            table = Table.read(p, format=fmt)
        except Exception as exc:  # astropy raises many kinds
            raise InputFileError(f"cannot read the table ({exc})",
                                 path=str(p)) from exc
        meta = table.meta.get("gyrometer", {})
        if fmt == "ascii.ecsv":
            version = meta.get("schema_version")
            if meta.get("schema") != RESULTS_SCHEMA or \
                    version != RESULTS_SCHEMA_VERSION:
                raise InputFileError(
                    f"not a {RESULTS_SCHEMA} version "
                    f"{RESULTS_SCHEMA_VERSION} table (found schema "
                    f"{meta.get('schema')!r} version {version!r})",
                    path=str(p), keyword="schema_version")
        else:
            units = {name: unit for name, unit, _ in COLUMNS}
            for name in table.colnames:
                if units.get(name):
                    table[name].unit = units[name]
            if "galaxy" in table.colnames:
                table["galaxy"] = table["galaxy"].astype(str)
    missing = [name for name, _, _ in COLUMNS if name not in table.colnames]
    if missing:
        raise InputFileError(f"not a Gyrometer results table: missing "
                             f"column(s) {', '.join(missing[:5])}",
                             path=str(p))
    for name in _TEXT_COLUMNS:
        col = table[name]
        if hasattr(col, "mask"):  # empty strings read back as masked in CSV
            table[name] = [("" if m else str(v)) for v, m in
                           zip(col.data.data, np.ma.getmaskarray(col))]
        table[name] = table[name].astype(str)
    for name, _, _ in COLUMNS:
        col = table[name]
        if name not in _TEXT_COLUMNS and hasattr(col, "mask"):
            table[name] = np.ma.filled(col.astype(float), np.nan)
            if dict((n, u_) for n, u_, _ in COLUMNS)[name]:
                table[name].unit = dict((n, u_) for n, u_, _ in COLUMNS)[name]
    return table


def merge_results(paths: Iterable[str | os.PathLike]):
    """Stack many results files into one table, one row per galaxy.

    The merged table's ``meta["gyrometer"]["sources"]`` lists each file with
    the metadata it carried (inputs, settings, seed, software).
    """
    from astropy.table import vstack

    tables = []
    sources = []
    for path in paths:
        t = read_results(path)
        names = [n for n, _, _ in COLUMNS]
        tables.append(t[names])
        meta = dict(t.meta.get("gyrometer", {}))
        meta.pop("schema", None)
        meta.pop("schema_version", None)
        sources.append({"path": str(Path(path)), **_jsonable(meta)})
    if not tables:
        raise InputFileError("no results files given to merge")
    merged = vstack(tables, join_type="exact", metadata_conflicts="silent")
    merged.meta.clear()
    merged.meta["gyrometer"] = {"schema": RESULTS_SCHEMA,
                                "schema_version": RESULTS_SCHEMA_VERSION,
                                "sources": sources}
    return merged


# -- rounding -----------------------------------------------------------------
def pdg_decimal_place(error: float) -> int:
    """Decimal exponent to which ``error`` (and its value) is rounded.

    Particle Data Group rule (Review of Particle Physics, Introduction,
    "Rounding"): three highest-order digits 100-354 keep two significant
    digits; 355-949 keep one; 950-999 round up to 1000 and keep two.
    Returns ``p`` such that the last kept digit is ``10**p`` (``-1`` means
    one decimal).

    Examples
    --------
    >>> pdg_decimal_place(0.827)   # 827 -> one digit: 0.8
    -1
    >>> pdg_decimal_place(0.0334)  # 334 -> two digits: 0.033
    -3
    >>> pdg_decimal_place(0.976)   # 976 -> 1.0, two digits
    -1
    """
    if not (math.isfinite(error) and error > 0):
        raise ValueError("the uncertainty must be a positive finite number")
    d = Decimal(repr(float(error)))
    exponent = d.adjusted()  # power of ten of the leading digit
    three = int((d.scaleb(2 - exponent)).to_integral_value(ROUND_DOWN))
    if three <= 354:
        return exponent - 1
    return exponent  # 355-949: one digit; 950-999: 10**(e+1) with two digits


def _round_at(x: float, place: int) -> Decimal:
    return Decimal(repr(float(x))).quantize(Decimal(1).scaleb(place),
                                            rounding=ROUND_HALF_UP)


def round_to_uncertainty(value: float, plus: float, minus: float | None = None
                         ) -> tuple[str, str, str]:
    """Round a value and its errors with the PDG rule; returns strings.

    The smaller of ``plus`` and ``minus`` sets the decimal place.
    """
    minus = plus if minus is None else minus
    place = pdg_decimal_place(min(plus, minus))
    out = []
    for x in (value, plus, minus):
        q = _round_at(x, place)
        if q == 0:
            q = abs(q)  # no "-0"
        text = format(q, "f")
        out.append(text)
    return out[0], out[1], out[2]


def format_value_error(value: float, plus: float, minus: float | None = None,
                       *, math_mode: bool = True) -> str:
    """LaTeX text of ``value`` with its errors, PDG-rounded.

    Asymmetric errors give ``$52^{+13}_{-11}$``; equal rounded errors give
    ``$52 \\pm 12$``; an unknown error gives the value with two decimals;
    an unknown value gives an empty string.
    """
    if not math.isfinite(value):
        return ""
    errs = [e for e in (plus, minus) if e is not None]
    if not errs or not all(math.isfinite(e) and e > 0 for e in errs):
        text = f"{value:.2f}"
    else:
        v, a, b = round_to_uncertainty(value, plus,
                                       plus if minus is None else minus)
        text = f"{v} \\pm {a}" if a == b else f"{v}^{{+{a}}}_{{-{b}}}"
    return f"${text}$" if math_mode else text


# -- LaTeX --------------------------------------------------------------------
#: Paper-table columns: (header, unit text, kind, source column).
_LATEX_COLUMNS: tuple[tuple[str, str, str, str], ...] = (
    ("Galaxy", "", "text", "galaxy"),
    ("Tracer", "", "text", "tracer"),
    ("Route", "", "text", "route"),
    ("$D$", "(Mpc)", "fixed1", "distance_mpc"),
    ("$i$", "(deg)", "fixed1", "inc_deg"),
    ("PA", "(deg)", "fixed1", "pa_deg"),
    ("$N_{\\rm slit}$", "", "int", "n_slits"),
    ("$\\Omega_p$", "(km s$^{-1}$ arcsec$^{-1}$)", "est", "omega_p_arcsec"),
    ("$\\Omega_p$", "(km s$^{-1}$ kpc$^{-1}$)", "est", "omega_p_kpc"),
    ("$R_{\\rm CR}$", "(kpc)", "est", "r_cr_kpc"),
    ("$R_{\\rm bar}$", "(kpc)", "est", "r_bar_kpc"),
    ("$\\mathcal{R}$", "", "est", "rate"),
    ("Class", "", "text", "rate_class"),
)

_LATEX_SPECIALS = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%",
                   "$": r"\$", "#": r"\#", "_": r"\_", "{": r"\{",
                   "}": r"\}", "~": r"\textasciitilde{}",
                   "^": r"\textasciicircum{}"}


def _escape(text: str) -> str:
    return "".join(_LATEX_SPECIALS.get(ch, ch) for ch in str(text))


def _cell(table, i: int, kind: str, name: str, empty: str) -> str:
    if kind == "text":
        text = str(table[name][i])
        return _escape(text) if text else empty
    if kind == "int":
        return str(int(table[name][i]))
    value = float(np.asarray(table[name][i]))
    if not math.isfinite(value):
        return empty
    if kind == "fixed1":
        return f"{value:.1f}"
    plus = float(np.asarray(table[name + "_plus"][i]))
    minus = float(np.asarray(table[name + "_minus"][i]))
    return format_value_error(value, plus, minus) or empty


def latex_table(table, style: str = "aastex", *,
                caption: str = "Bar pattern speeds",
                label: str = "tab:pattern-speeds") -> str:
    """LaTeX text of a results table, one row per galaxy.

    Parameters
    ----------
    table : astropy.table.Table
        From :func:`result_table`, :func:`read_results` or
        :func:`merge_results`.
    style : {"aastex", "tabular"}
        ``"aastex"``: an AASTeX ``deluxetable`` (``\\colhead``,
        ``\\startdata`` ... ``\\enddata``, missing entries ``\\nodata``).
        ``"tabular"``: a plain ``tabular`` in a ``table`` float with
        ``\\hline`` rules (missing entries ``\\ldots``).

    Notes
    -----
    Values are rounded with the Particle Data Group rule (see the module
    docstring); asymmetric errors are written ``value^{+a}_{-b}``.
    """
    if style not in ("aastex", "tabular"):
        raise ValueError("style must be 'aastex' or 'tabular'")
    cols = _LATEX_COLUMNS
    align = "lll" + "c" * (len(cols) - 3)
    note = ("Values are medians with 16th--84th percentile errors of the "
            "Monte Carlo budget, rounded with the Particle Data Group rule.")
    lines: list[str] = []
    if style == "aastex":
        empty = r"\nodata"
        lines.append(f"\\begin{{deluxetable*}}{{{align}}}")
        lines.append(f"\\tablecaption{{{caption}\\label{{{label}}}}}")
        heads = " & ".join(f"\\colhead{{{h}}}" for h, _, _, _ in cols)
        units = " & ".join(f"\\colhead{{{u_}}}" for _, u_, _, _ in cols)
        lines.append(f"\\tablehead{{{heads} \\\\")
        lines.append(f"{units}}}")
        lines.append("\\startdata")
        rows = [" & ".join(_cell(table, i, k, n, empty) for _, _, k, n in cols)
                for i in range(len(table))]
        lines.append(" \\\\\n".join(rows))
        lines.append("\\enddata")
        lines.append(f"\\tablecomments{{{note}}}")
        lines.append("\\end{deluxetable*}")
    else:
        empty = r"\ldots"
        lines.append("\\begin{table*}")
        lines.append("\\centering")
        lines.append(f"\\caption{{{caption}}}")
        lines.append(f"\\label{{{label}}}")
        lines.append(f"\\begin{{tabular}}{{{align}}}")
        lines.append("\\hline\\hline")
        lines.append(" & ".join(h for h, _, _, _ in cols) + " \\\\")
        lines.append(" & ".join(u_ for _, u_, _, _ in cols) + " \\\\")
        lines.append("\\hline")
        for i in range(len(table)):
            lines.append(" & ".join(_cell(table, i, k, n, empty)
                                    for _, _, k, n in cols) + " \\\\")
        lines.append("\\hline")
        lines.append("\\end{tabular}")
        lines.append(f"\\par\\smallskip{{\\footnotesize {note}}}")
        lines.append("\\end{table*}")
    return "\n".join(lines) + "\n"


def write_latex(table, path: str | os.PathLike, style: str = "aastex",
                overwrite: bool = False, **kwargs) -> Path:
    """Write :func:`latex_table` text to ``path`` atomically."""
    try:
        text = latex_table(table, style, **kwargs)
    except ValueError as exc:
        raise OutputError(str(exc), path=str(path), keyword="style",
                          value=style) from exc
    return write_text_atomic(path, text, overwrite)
