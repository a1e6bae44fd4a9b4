"""Rotation curves: the data class, a table reader and tilted-ring fits.

A :class:`RotationCurve` is the circular velocity of the disk against radius
in the disk plane. It comes either from a table (:func:`load_rotation_curve`)
or from a line-of-sight velocity map and a disk geometry
(:func:`tilted_rings`). Radii are stored in arcsec (distance-free); kpc
views need a distance.

Ring model (thin disk; Begeman 1989, A&A 223, 47, tilted rings)::

    v_los = V_sys + sin i [V_rot(R) cos(theta) + V_rad(R) sin(theta)]

theta is the disk azimuth from the receding line of nodes. The sign of
``V_rad`` as inflow or outflow needs the near side, which this model does not
know: it is reported with the azimuth convention of
:func:`gyrometer.core.coords.lon_to_disk` only.

Limitations stated here once:

* Beam smearing flattens the inner rise of the curve (the velocity map is
  the intensity-weighted mean over the PSF). It is not corrected: rings
  inside two PSF FWHM are flagged (common practice) and excluded from the
  smooth-model fits by default.
* Inside a bar, gas and stars stream along the bar and ``V_rot`` is not the
  circular velocity (Spekkens & Sellwood 2007 model this with bisymmetric
  flows); flag the bar region before using the curve for resonances.
* For interferometric data (noise correlated over the beam) errors are
  inflated by ``sqrt(beam area / pixel area)`` (common practice).
"""

from __future__ import annotations

import math
import os
import re
import warnings
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np
from scipy.optimize import least_squares

from .coords import lon_to_disk, sky_grid, sky_to_lon
from .errors import (DataContentError, DataQualityWarning, FitError,
                     InputFileError, RotationCurveError)
from .geometry import DiskGeometry, kpc_per_arcsec
from .progress import CancelFlag, ProgressCallback, check_cancel, report

__all__ = [
    "RotationCurve",
    "load_rotation_curve",
    "AsymmetricDrift",
    "asymmetric_drift_vc",
    "RingTable",
    "TiltedRingResult",
    "tilted_rings",
]


def _as_array(value, name: str, path: str | None) -> np.ndarray:
    try:
        array = np.array(value, dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise RotationCurveError(f"column '{name}' is not numeric", path=path,
                                 keyword=name) from exc
    array.flags.writeable = False
    return array


@dataclass(frozen=True, eq=False)
class RotationCurve:
    """Circular velocity against radius in the disk plane.

    Attributes
    ----------
    r_arcsec : numpy.ndarray
        Radii, arcsec, strictly increasing, >= 0.
    v_kms, v_err_kms : numpy.ndarray
        Circular (or rotation) velocity and its 1-sigma error (> 0), km/s.
    v_rad_kms, v_rad_err_kms : numpy.ndarray or None
        Radial velocity per ring and its error (tilted rings only).
    flagged : numpy.ndarray of bool or None
        True for points not to be trusted as circular velocity (beam
        smearing, bar streaming); excluded from model fits by default.
    flag_reason : str
        Why points were flagged.
    source : str
        Where the curve came from (file name, ``"tilted rings"``...).
    distance_mpc : float or None
        Distance, needed for the kpc views.
    path : str or None
        File read, quoted in error messages.
    """

    r_arcsec: np.ndarray
    v_kms: np.ndarray
    v_err_kms: np.ndarray
    v_rad_kms: np.ndarray | None = None
    v_rad_err_kms: np.ndarray | None = None
    flagged: np.ndarray | None = None
    flag_reason: str = ""
    source: str = ""
    distance_mpc: float | None = None
    path: str | None = None

    def __post_init__(self) -> None:
        p = self.path
        r = _as_array(self.r_arcsec, "radius", p)
        v = _as_array(self.v_kms, "velocity", p)
        e = _as_array(self.v_err_kms, "velocity error", p)
        if not (r.size == v.size == e.size):
            raise RotationCurveError(
                "radius, velocity and error columns differ in length", path=p)
        if r.size < 3:
            raise RotationCurveError(
                f"a rotation curve needs at least 3 points, got {r.size}",
                path=p, hint="add points or use a published curve")
        for name, arr in (("radius", r), ("velocity", v),
                          ("velocity error", e)):
            bad = ~np.isfinite(arr)
            if bad.any():
                raise RotationCurveError(
                    f"column '{name}' has {int(bad.sum())} non-finite values "
                    f"(first at row {int(np.argmax(bad)) + 1})", path=p,
                    keyword=name)
        if (r < 0).any():
            raise RotationCurveError("radii must be >= 0", path=p,
                                     keyword="radius", value=float(r.min()))
        if (np.diff(r) <= 0).any():
            row = int(np.argmax(np.diff(r) <= 0)) + 2
            raise RotationCurveError(
                f"radii must be strictly increasing (row {row})", path=p,
                keyword="radius", hint="sort the table and merge duplicates")
        if (e <= 0).any():
            row = int(np.argmax(e <= 0)) + 1
            raise RotationCurveError(
                f"velocity errors must be positive (row {row})", path=p,
                keyword="velocity error",
                hint="a zero error would give the point infinite weight")
        object.__setattr__(self, "r_arcsec", r)
        object.__setattr__(self, "v_kms", v)
        object.__setattr__(self, "v_err_kms", e)
        for name in ("v_rad_kms", "v_rad_err_kms"):
            value = getattr(self, name)
            if value is not None:
                arr = _as_array(value, name, p)
                if arr.size != r.size:
                    raise RotationCurveError(f"{name} has the wrong length",
                                             path=p, keyword=name)
                object.__setattr__(self, name, arr)
        if self.flagged is None:
            flags = np.zeros(r.size, dtype=bool)
        else:
            flags = np.array(self.flagged, dtype=bool).ravel()
            if flags.size != r.size:
                raise RotationCurveError("flag column has the wrong length",
                                         path=p, keyword="flagged")
        flags.flags.writeable = False
        object.__setattr__(self, "flagged", flags)
        if self.distance_mpc is not None and not (
                math.isfinite(self.distance_mpc) and self.distance_mpc > 0):
            raise RotationCurveError("distance must be positive", path=p,
                                     keyword="distance_mpc",
                                     value=self.distance_mpc)

    def __len__(self) -> int:
        return int(self.r_arcsec.size)

    @property
    def r_kpc(self) -> np.ndarray:
        """Radii in kpc (needs ``distance_mpc``)."""
        if self.distance_mpc is None:
            raise RotationCurveError(
                "radii in kpc need a distance", path=self.path,
                keyword="distance_mpc", hint="set the galaxy distance")
        return self.r_arcsec * kpc_per_arcsec(self.distance_mpc)

    @property
    def r(self) -> u.Quantity:
        return self.r_arcsec * u.arcsec

    @property
    def v(self) -> u.Quantity:
        return self.v_kms * u.km / u.s

    @property
    def v_err(self) -> u.Quantity:
        return self.v_err_kms * u.km / u.s

    def to_table(self):
        """The curve as an :class:`astropy.table.QTable` (ECSV-ready, units
        kept; kpc column when the distance is known)."""
        from astropy.table import QTable

        kms = u.km / u.s
        t = QTable()
        t["r"] = self.r_arcsec * u.arcsec
        if self.distance_mpc is not None:
            t["r_kpc"] = self.r_kpc * u.kpc
        t["v"] = self.v_kms * kms
        t["e_v"] = self.v_err_kms * kms
        if self.v_rad_kms is not None:
            t["v_rad"] = self.v_rad_kms * kms
            if self.v_rad_err_kms is not None:
                t["e_v_rad"] = self.v_rad_err_kms * kms
        t["flagged"] = self.flagged
        t.meta.update(source=self.source, distance_mpc=self.distance_mpc,
                      flag_reason=self.flag_reason)
        return t

    def unflagged(self) -> "RotationCurve":
        """The curve without flagged points (needs >= 3 left)."""
        keep = ~self.flagged
        return self.select(keep)

    def select(self, keep) -> "RotationCurve":
        """A copy keeping the points where ``keep`` is True."""
        keep = np.asarray(keep, dtype=bool)
        sub = lambda a: None if a is None else a[keep]  # noqa: E731
        return RotationCurve(self.r_arcsec[keep], self.v_kms[keep],
                             self.v_err_kms[keep], sub(self.v_rad_kms),
                             sub(self.v_rad_err_kms), self.flagged[keep],
                             self.flag_reason, self.source, self.distance_mpc,
                             self.path)

    def with_flags(self, flagged, reason: str) -> "RotationCurve":
        """A copy with new flags (e.g. the bar region marked by the user)."""
        return RotationCurve(self.r_arcsec, self.v_kms, self.v_err_kms,
                             self.v_rad_kms, self.v_rad_err_kms, flagged,
                             reason, self.source, self.distance_mpc, self.path)


# --------------------------------------------------------------------------
# Reading tables
# --------------------------------------------------------------------------

_RADIUS_NAMES = ("r", "rad", "radius", "rr", "r_arcsec", "r_kpc", "r_pc",
                 "radius_arcsec", "radius_kpc", "rgal")
_VEL_NAMES = ("v", "vc", "v_c", "vcirc", "v_circ", "vrot", "v_rot", "vel",
              "velocity", "v_kms", "vc_kms", "vrot_kms")
_ERR_NAMES = ("v_err", "verr", "e_v", "ev", "dv", "err", "error", "sigma_v",
              "e_vc", "vc_err", "e_vrot", "vrot_err", "v_err_kms", "e_vel",
              "vel_err", "errv", "v_error")
_UNIT_SUFFIX = re.compile(r"^(.*?)[\s_]*[\[(]?\s*(arcsec|arcmin|deg|kpc|pc|"
                          r"mpc|km/s|kms|m/s)\s*[\])]?$", re.IGNORECASE)
_SUFFIX_UNITS = {"arcsec": u.arcsec, "arcmin": u.arcmin, "deg": u.deg,
                 "kpc": u.kpc, "pc": u.pc, "mpc": u.Mpc, "km/s": u.km / u.s,
                 "kms": u.km / u.s, "m/s": u.m / u.s}


def _normalise(name: str) -> tuple[str, u.UnitBase | None]:
    """Lower-cased column name without a unit suffix, and that unit."""
    text = name.strip().lower()
    match = _UNIT_SUFFIX.match(text)
    if match and match.group(1):
        return match.group(1).strip(" _"), _SUFFIX_UNITS[match.group(2).lower()]
    return text, None


def _find_column(table, candidates, what: str, path: str,
                 exclude=()) -> tuple[str, u.UnitBase | None]:
    for col in table.colnames:
        if col in exclude:
            continue
        base, unit = _normalise(col)
        if base in candidates or col.lower() in candidates:
            col_unit = table[col].unit
            return col, (u.Unit(col_unit) if col_unit is not None else unit)
    raise RotationCurveError(
        f"no {what} column found among {list(table.colnames)}", path=path,
        keyword=what,
        hint=f"name it one of {', '.join(candidates[:6])} ...")


def load_rotation_curve(path: str | os.PathLike, *,
                        distance_mpc: float | None = None,
                        radius_unit: str | u.UnitBase | None = None,
                        velocity_unit: str | u.UnitBase | None = None
                        ) -> RotationCurve:
    """Read a rotation curve from an ECSV, CSV or whitespace text table.

    The table needs a header naming a radius column (``r``, ``radius``,
    ``r_kpc`` ...), a velocity column (``v``, ``vc``, ``vrot`` ...) and its
    error (``v_err``, ``e_v``, ``err`` ...). Units come from the ECSV column
    units, else from a name suffix (``r_kpc``, ``r [arcsec]``), else from
    ``radius_unit`` / ``velocity_unit`` (velocity defaults to km/s; the
    radius unit has no default). The radii must increase strictly down the
    table: a table out of order is refused, never sorted silently.

    Parameters
    ----------
    path : path-like
        The table.
    distance_mpc : float, optional
        Needed when the radius is a length (kpc, pc) to turn it into arcsec;
        kept on the curve for the kpc views.
    radius_unit, velocity_unit : str or astropy unit, optional
        Units to assume where the file does not say.

    Raises
    ------
    InputFileError
        The file does not exist or cannot be read as a table.
    RotationCurveError
        A column is missing, non-numeric, has the wrong unit, the radii do
        not increase strictly down the table (the message names the column
        and the first offending row), or the values are invalid (see
        :class:`RotationCurve`).
    """
    from astropy.table import Table

    path = os.fspath(path)
    if not os.path.isfile(path):
        raise InputFileError("rotation-curve file not found", path=path)
    lower = path.lower()
    if lower.endswith(".ecsv"):
        formats = ["ascii.ecsv"]
    elif lower.endswith(".csv"):
        formats = ["ascii.csv"]
    else:
        formats = ["ascii.ecsv", "ascii.commented_header", "ascii.basic",
                   "ascii.csv"]
    table = None
    problems = []
    for fmt in formats:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                candidate = Table.read(path, format=fmt)
        except Exception as exc:  # astropy raises many types here
            problems.append(f"{fmt}: {exc}")
            continue
        if len(candidate.colnames) >= 3 and len(candidate) > 0:
            table = candidate
            break
        problems.append(f"{fmt}: {len(candidate.colnames)} columns")
    if table is None:
        raise InputFileError(
            "cannot read a table with a header and at least 3 columns "
            f"({'; '.join(problems)[:300]})", path=path,
            hint="write a header line such as 'r_arcsec v_kms v_err_kms'")

    r_col, r_unit = _find_column(table, _RADIUS_NAMES, "radius", path)
    v_col, v_unit = _find_column(table, _VEL_NAMES, "velocity", path,
                                 exclude=(r_col,))
    e_col, e_unit = _find_column(table, _ERR_NAMES, "velocity error", path,
                                 exclude=(r_col, v_col))

    if r_unit is None:
        if radius_unit is None:
            raise RotationCurveError(
                f"the unit of column '{r_col}' is not given", path=path,
                keyword=r_col,
                hint="use an ECSV unit, a suffix like r_kpc, or radius_unit=")
        r_unit = u.Unit(radius_unit)
    vel_default = u.Unit(velocity_unit) if velocity_unit else u.km / u.s
    v_unit = v_unit or vel_default
    e_unit = e_unit or v_unit

    def values(col):
        data = table[col]
        if hasattr(data, "mask") and np.any(getattr(data, "mask", False)):
            raise RotationCurveError(f"column '{col}' has empty cells",
                                     path=path, keyword=col)
        try:
            return np.asarray(data, dtype=float)
        except (TypeError, ValueError) as exc:
            raise RotationCurveError(f"column '{col}' is not numeric",
                                     path=path, keyword=col) from exc

    r_val = values(r_col) * r_unit
    if r_unit.physical_type == "angle":
        r_arcsec = r_val.to_value(u.arcsec)
    elif r_unit.physical_type == "length":
        if distance_mpc is None:
            raise RotationCurveError(
                f"column '{r_col}' is a length ({r_unit}); converting it to "
                "arcsec needs the distance", path=path, keyword=r_col,
                hint="pass distance_mpc")
        r_arcsec = r_val.to_value(u.kpc) / kpc_per_arcsec(distance_mpc)
    else:
        raise RotationCurveError(
            f"column '{r_col}' has unit {r_unit}, neither an angle nor a "
            "length", path=path, keyword=r_col)
    out = []
    for col, unit in ((v_col, v_unit), (e_col, e_unit)):
        try:
            out.append((values(col) * unit).to_value(u.km / u.s))
        except u.UnitConversionError as exc:
            raise RotationCurveError(
                f"column '{col}' has unit {unit}, not a velocity", path=path,
                keyword=col) from exc
    _check_increasing(values(r_col), r_col, path)
    return RotationCurve(r_arcsec, out[0], out[1],
                         source=os.path.basename(path),
                         distance_mpc=distance_mpc, path=path)


def _check_increasing(r: np.ndarray, column: str, path: str) -> None:
    """Refuse radii that do not strictly increase down the table.

    A table out of order is not sorted silently: a jumbled or repeated
    radius usually means rows pasted from two sources or a wrong column,
    which the user should see. Rows are counted from 1, the first data row
    after the header. Non-finite radii are left to :class:`RotationCurve`,
    which names them.
    """
    step = np.diff(r)
    bad = step <= 0                       # NaN compares False: not flagged here
    if not bad.any():
        return
    i = int(np.argmax(bad)) + 1           # index of the offending row
    what = "repeats" if step[i - 1] == 0 else "is smaller than"
    raise RotationCurveError(
        f"radii must be strictly increasing down the table: row {i + 1} "
        f"({r[i]:g}) {what} row {i} ({r[i - 1]:g})", path=path,
        keyword=column, value=float(r[i]),
        hint="sort the table by radius and merge rows with the same radius")


# --------------------------------------------------------------------------
# Asymmetric drift
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class AsymmetricDrift:
    """Settings of the asymmetric-drift correction for stellar tracers.

    The correction follows the Jeans equation for an axisymmetric disk with
    the velocity ellipsoid aligned with cylindrical coordinates (Binney &
    Tremaine 2008, §4.8.2; equation 4.228 there, number quoted from
    memory)::

        V_c^2 = Vbar_phi^2 + sigma_R^2 [-dln nu/dln R - dln sigma_R^2/dln R
                                         - (1 - sigma_phi^2/sigma_R^2)]

    Assumptions made here (derived): the tracer density is an exponential
    disk ``nu ~ exp(-R/h)`` of constant thickness, ``sigma_R^2 ~ exp(-R/h)``
    (constant disk thickness in an isothermal sheet), so the bracket is
    ``2R/h - (1 - sigma_phi^2/sigma_R^2)``; with the epicyclic ratio
    ``sigma_phi^2/sigma_R^2 = kappa^2/(4 Omega^2) = 1/2`` of a flat curve it is
    ``2R/h - 1/2``. ``sigma_R`` is obtained per ring from the line-of-sight
    dispersion, ``sigma_los^2 = sigma_R^2 [sin^2 i (sin^2 theta +
    (sigma_phi/sigma_R)^2 cos^2 theta) + (sigma_z/sigma_R)^2 cos^2 i]``, with
    ``sigma_z/sigma_R`` assumed (0.5-0.7 is typical, from memory). Jeans
    anisotropic models are the rigorous alternative.

    Attributes
    ----------
    scale_length_arcsec : float
        Exponential scale length h of the tracer's surface density, arcsec.
    sigma_z_over_sigma_r : float
        Assumed vertical-to-radial dispersion ratio (default 0.6).
    sigma_phi2_over_sigma_r2 : float
        ``sigma_phi^2 / sigma_R^2`` (default 0.5, epicyclic flat curve).
    """

    scale_length_arcsec: float
    sigma_z_over_sigma_r: float = 0.6
    sigma_phi2_over_sigma_r2: float = 0.5

    def __post_init__(self) -> None:
        if not (math.isfinite(self.scale_length_arcsec)
                and self.scale_length_arcsec > 0):
            raise RotationCurveError("the disk scale length must be positive",
                                     keyword="scale_length_arcsec",
                                     value=self.scale_length_arcsec)
        if not 0 <= self.sigma_z_over_sigma_r <= 2:
            raise RotationCurveError("sigma_z/sigma_R must be in [0, 2]",
                                     keyword="sigma_z_over_sigma_r",
                                     value=self.sigma_z_over_sigma_r)
        if not 0 < self.sigma_phi2_over_sigma_r2 <= 1.5:
            raise RotationCurveError("sigma_phi^2/sigma_R^2 must be in (0, 1.5]",
                                     keyword="sigma_phi2_over_sigma_r2",
                                     value=self.sigma_phi2_over_sigma_r2)


def asymmetric_drift_vc(r_arcsec, v_phi_kms, v_phi_err_kms, sigma_r_kms,
                        sigma_r_err_kms, settings: AsymmetricDrift):
    """Circular velocity from mean rotation and radial dispersion.

    ``V_c^2 = Vbar_phi^2 + sigma_R^2 (2R/h - 1 + sigma_phi^2/sigma_R^2)``
    (see :class:`AsymmetricDrift` for the derivation and assumptions).
    Errors are propagated to first order.

    Returns
    -------
    vc_kms, vc_err_kms : numpy.ndarray
        NaN where ``V_c^2 <= 0``.
    """
    r = np.asarray(r_arcsec, dtype=float)
    vphi = np.asarray(v_phi_kms, dtype=float)
    sr = np.asarray(sigma_r_kms, dtype=float)
    factor = (2.0 * r / settings.scale_length_arcsec - 1.0
              + settings.sigma_phi2_over_sigma_r2)
    vc2 = vphi**2 + sr**2 * factor
    with np.errstate(invalid="ignore", divide="ignore"):
        vc = np.where(vc2 > 0, np.sqrt(np.abs(vc2)), np.nan)
        err = np.sqrt((vphi * np.asarray(v_phi_err_kms)) ** 2
                      + (sr * factor * np.asarray(sigma_r_err_kms)) ** 2) / vc
    return vc, err


# --------------------------------------------------------------------------
# Tilted rings
# --------------------------------------------------------------------------

_GEOMETRY_FREE = ("vsys", "pa", "inc")
#: Tracers usually observed with interferometers (noise correlated over the beam).
_RADIO_TRACERS = ("HI", "CO", "molecular gas")
#: Gaussian beam area in units of FWHM^2: pi / (4 ln 2).
_BEAM_AREA_PER_FWHM2 = math.pi / (4.0 * math.log(2.0))


@dataclass(frozen=True, eq=False)
class RingTable:
    """Per-ring results of a tilted-ring fit (one entry per ring).

    All arrays have one value per ring; geometry columns hold the fixed
    values where the geometry was not free. Errors are 1 sigma from the
    per-ring least-squares covariance scaled by the reduced chi^2 and by the
    beam correlation factor.
    """

    r_arcsec: np.ndarray
    r_inner_arcsec: np.ndarray
    r_outer_arcsec: np.ndarray
    vrot_kms: np.ndarray
    vrot_err_kms: np.ndarray
    vrad_kms: np.ndarray
    vrad_err_kms: np.ndarray
    vsys_kms: np.ndarray
    vsys_err_kms: np.ndarray
    pa_deg: np.ndarray
    pa_err_deg: np.ndarray
    inc_deg: np.ndarray
    inc_err_deg: np.ndarray
    n_pixels: np.ndarray
    reduced_chi2: np.ndarray
    beam_smeared: np.ndarray
    sigma_r_kms: np.ndarray | None = None
    sigma_r_err_kms: np.ndarray | None = None
    vc_kms: np.ndarray | None = None
    vc_err_kms: np.ndarray | None = None

    def to_table(self):
        """The rings as an :class:`astropy.table.Table` with units."""
        from astropy.table import QTable

        kms = u.km / u.s
        cols = {"r": (self.r_arcsec, u.arcsec),
                "r_inner": (self.r_inner_arcsec, u.arcsec),
                "r_outer": (self.r_outer_arcsec, u.arcsec),
                "vrot": (self.vrot_kms, kms), "e_vrot": (self.vrot_err_kms, kms),
                "vrad": (self.vrad_kms, kms), "e_vrad": (self.vrad_err_kms, kms),
                "vsys": (self.vsys_kms, kms), "e_vsys": (self.vsys_err_kms, kms),
                "pa": (self.pa_deg, u.deg), "e_pa": (self.pa_err_deg, u.deg),
                "inc": (self.inc_deg, u.deg), "e_inc": (self.inc_err_deg, u.deg)}
        if self.vc_kms is not None:
            cols.update({"sigma_R": (self.sigma_r_kms, kms),
                         "e_sigma_R": (self.sigma_r_err_kms, kms),
                         "vc": (self.vc_kms, kms), "e_vc": (self.vc_err_kms, kms)})
        table = QTable({k: v * un for k, (v, un) in cols.items()})
        table["n_pixels"] = self.n_pixels
        table["reduced_chi2"] = self.reduced_chi2
        table["beam_smeared"] = self.beam_smeared
        return table


@dataclass(frozen=True, eq=False)
class TiltedRingResult:
    """Outcome of :func:`tilted_rings`.

    Attributes
    ----------
    curve : RotationCurve
        Circular velocity per ring (asymmetric-drift corrected when asked),
        beam-smeared rings flagged.
    rings : RingTable
        Everything fitted per ring.
    geometry : DiskGeometry
        The geometry used (fixed values and starting point of free ones).
    free : tuple of str
        Geometry parameters fitted per ring.
    notes : tuple of str
        Limitations and skipped rings, in plain words.
    """

    curve: RotationCurve
    rings: RingTable
    geometry: DiskGeometry
    free: tuple[str, ...]
    notes: tuple[str, ...] = field(default_factory=tuple)


def _ring_model(params, names, east, north, base: DiskGeometry):
    """Line-of-sight velocity of one ring for the parameter vector."""
    p = dict(zip(names, params))
    pa = p.get("pa", base.pa_deg)
    inc = p.get("inc", base.inc_deg)
    vsys = p.get("vsys", base.vsys_kms)
    X, Y = sky_to_lon(east, north, pa)
    _, cos_t, sin_t = lon_to_disk(X, Y, inc)
    s_i = math.sin(math.radians(inc))
    return (vsys + s_i * (p["vrot"] * cos_t + p.get("vrad", 0.0) * sin_t),
            cos_t)


def tilted_rings(maps, geometry: DiskGeometry, *,
                 ring_width_arcsec: float | None = None,
                 r_max_arcsec: float | None = None,
                 free_geometry: tuple[str, ...] = (),
                 fit_radial: bool = True,
                 exclude_minor_axis_deg: float = 20.0,
                 min_pixels: int = 8,
                 min_coverage: float = 0.5,
                 asymmetric_drift: AsymmetricDrift | None = None,
                 pixels_correlated: bool | None = None,
                 progress: ProgressCallback | None = None,
                 cancel: CancelFlag | None = None) -> TiltedRingResult:
    """Fit a thin rotating disk ring by ring to a velocity map.

    Model per ring (Begeman 1989)::

        v_los = V_sys + sin i [V_rot cos(theta) + V_rad sin(theta)]

    Pixels within ``exclude_minor_axis_deg`` of the minor axis are dropped
    and the rest weighted by ``|cos theta| / sigma_v^2`` (common practice).
    With fixed geometry the fit is linear; parameters named in
    ``free_geometry`` (``"vsys"``, ``"pa"``, ``"inc"``) are fitted per ring
    by nonlinear least squares starting from ``geometry``, with ring
    membership fixed by ``geometry`` and the centre fixed.

    Errors: the least-squares covariance scaled by the reduced chi^2 (always
    when the map has no velocity errors, otherwise only when chi^2_red > 1),
    then, when the pixels' noise is correlated, by ``sqrt(N_pix per beam)``.

    Parameters
    ----------
    maps : MapSet
        Needs ``velocity_kms``; ``velocity_err_kms`` and ``psf_fwhm_arcsec``
        are used when present, ``dispersion_kms`` for asymmetric drift.
    geometry : DiskGeometry
        Centre, PA, inclination, V_sys (and the distance, kept on the curve).
    ring_width_arcsec : float, optional
        Default: the larger of the PSF FWHM and two pixels.
    r_max_arcsec : float, optional
        Outer edge of the last ring; default: the largest radius with data.
    free_geometry : tuple of str
        Geometry parameters free per ring.
    fit_radial : bool
        Fit ``V_rad`` (default) or fix it to 0.
    exclude_minor_axis_deg : float
        Half-width of the excluded wedge around the minor axis, degrees.
    min_pixels : int
        Rings with fewer usable pixels (or without data on both sides of
        the minor axis) are skipped and listed in ``notes``.
    min_coverage : float
        Rings whose valid pixels cover less than this fraction of the
        ring's area on the sky (field edges, masks) are skipped.
    asymmetric_drift : AsymmetricDrift, optional
        Correct the rotation of a stellar tracer to circular velocity.
    pixels_correlated : bool, optional
        Whether the noise of neighbouring pixels is correlated over the PSF
        (interferometric images, resampled cubes): errors are then inflated
        by ``sqrt(N_pix per beam)``. Default: True for radio tracers (HI,
        CO, molecular gas), False otherwise (IFU spaxels with independent
        noise).

    Raises
    ------
    DataContentError
        No usable velocities, or no ring could be fitted.
    """
    free = tuple(free_geometry)
    for name in free:
        if name not in _GEOMETRY_FREE:
            raise FitError(f"unknown free geometry parameter '{name}'",
                           keyword="free_geometry",
                           hint=f"choose from {_GEOMETRY_FREE}")
    if not 0 <= exclude_minor_axis_deg < 80:
        raise FitError("the minor-axis exclusion must be in [0, 80) degrees",
                       keyword="exclude_minor_axis_deg",
                       value=exclude_minor_axis_deg)
    vel = np.asarray(maps.velocity_kms, dtype=float)
    err = (None if maps.velocity_err_kms is None
           else np.asarray(maps.velocity_err_kms, dtype=float))
    good = np.isfinite(vel)
    if err is not None:
        good &= np.isfinite(err) & (err > 0)
    if asymmetric_drift is not None:
        if maps.dispersion_kms is None:
            raise DataContentError(
                "the asymmetric-drift correction needs a dispersion map",
                keyword="dispersion_kms")
        disp = np.asarray(maps.dispersion_kms, dtype=float)
        good &= np.isfinite(disp) & (disp > 0)
    if good.sum() < 3 * min_pixels:
        raise DataContentError("too few valid velocity pixels for rings",
                               value=int(good.sum()))
    grid = sky_grid(maps.wcs, maps.shape, geometry.ra_deg, geometry.dec_deg)
    east, north = grid.east_arcsec[good], grid.north_arcsec[good]
    v = vel[good]
    sig = np.ones_like(v) if err is None else err[good]
    X, Y = sky_to_lon(east, north, geometry.pa_deg)
    R, cos_t, sin_t = lon_to_disk(X, Y, geometry.inc_deg)

    pix = grid.pixel_scale_arcsec
    psf = maps.psf_fwhm_arcsec
    width = ring_width_arcsec or max(psf or 0.0, 2.0 * pix)
    if not width > 0:
        raise FitError("ring width must be positive", keyword="ring_width",
                       value=width)
    r_max = float(r_max_arcsec) if r_max_arcsec else float(R.max())
    edges = np.arange(0.0, r_max + 1e-9, width)
    if edges.size < 2:
        raise FitError("the ring width exceeds the data radius",
                       keyword="ring_width_arcsec", value=width)
    if pixels_correlated is None:
        pixels_correlated = maps.tracer in _RADIO_TRACERS
    beam_factor = 1.0
    if psf and pixels_correlated:
        beam_factor = math.sqrt(max(1.0, _BEAM_AREA_PER_FWHM2 * psf**2
                                    / pix**2))
    cos_lim = math.sin(math.radians(exclude_minor_axis_deg))

    names = ["vrot"] + (["vrad"] if fit_radial else []) + list(free)
    rows = []
    notes = []
    n_rings = edges.size - 1
    for k in range(n_rings):
        check_cancel(cancel, "tilted rings")
        report(progress, k, n_rings, "tilted rings")
        r_in, r_out = edges[k], edges[k + 1]
        sel = (R >= r_in) & (R < r_out) & (np.abs(cos_t) >= cos_lim)
        n = int(sel.sum())
        n_all = int(((R >= r_in) & (R < r_out)).sum())
        expected = math.pi * (r_out**2 - r_in**2) * geometry.cos_i / pix**2
        if n_all < min_coverage * expected:
            notes.append(f"ring {r_in:.3g}-{r_out:.3g} arcsec skipped "
                         f"(covers {n_all / expected:.0%} of the ring)")
            continue
        if n < max(min_pixels, len(names) + 2) or not (
                (cos_t[sel] > 0).any() and (cos_t[sel] < 0).any()):
            notes.append(f"ring {r_in:.3g}-{r_out:.3g} arcsec skipped "
                         f"({n} usable pixels or one side only)")
            continue
        e_k, n_k, v_k, s_k = east[sel], north[sel], v[sel], sig[sel]
        w_sqrt = np.sqrt(np.abs(cos_t[sel])) / s_k
        start = {"vrot": 0.0, "vrad": 0.0, "vsys": geometry.vsys_kms,
                 "pa": geometry.pa_deg, "inc": geometry.inc_deg}
        # linear start for vrot/vrad with the fixed geometry
        A = geometry.sin_i * np.column_stack(
            [cos_t[sel]] + ([sin_t[sel]] if fit_radial else []))
        sol, *_ = np.linalg.lstsq(A * w_sqrt[:, None],
                                  (v_k - geometry.vsys_kms) * w_sqrt,
                                  rcond=None)
        start["vrot"] = float(sol[0])
        if fit_radial:
            start["vrad"] = float(sol[1])
        x0 = np.array([start[nm] for nm in names])
        if free:
            lo = [-np.inf] * len(names)
            hi = [np.inf] * len(names)
            if "inc" in names:
                lo[names.index("inc")], hi[names.index("inc")] = 3.0, 87.0
            resid = lambda p: (_ring_model(p, names, e_k, n_k, geometry)[0]  # noqa: E731
                               - v_k) * w_sqrt
            fit = least_squares(resid, x0, bounds=(lo, hi), x_scale="jac")
            params, jac, res = fit.x, fit.jac, fit.fun
        else:
            params = x0
            jac = A * w_sqrt[:, None]
            res = (A @ params - (v_k - geometry.vsys_kms)) * w_sqrt
        dof = max(n - len(names), 1)
        chi2_red = float(res @ res) / dof
        try:
            cov = np.linalg.inv(jac.T @ jac)
        except np.linalg.LinAlgError:
            notes.append(f"ring {r_in:.3g}-{r_out:.3g} arcsec skipped "
                         "(degenerate fit)")
            continue
        scale = chi2_red if err is None else max(1.0, chi2_red)
        perr = np.sqrt(np.clip(np.diag(cov), 0, None) * scale) * beam_factor
        p = dict(zip(names, params))
        pe = dict(zip(names, perr))
        row = dict(r=0.5 * (r_in + r_out), r_in=r_in, r_out=r_out,
                   vrot=p["vrot"], vrot_err=pe["vrot"],
                   vrad=p.get("vrad", 0.0), vrad_err=pe.get("vrad", 0.0),
                   vsys=p.get("vsys", geometry.vsys_kms),
                   vsys_err=pe.get("vsys", 0.0),
                   pa=p.get("pa", geometry.pa_deg) % 360.0,
                   pa_err=pe.get("pa", 0.0),
                   inc=p.get("inc", geometry.inc_deg),
                   inc_err=pe.get("inc", 0.0), n=n, chi2=chi2_red)
        if asymmetric_drift is not None:
            row.update(_ring_sigma_r(disp[good][(R >= r_in) & (R < r_out)],
                                     cos_t[(R >= r_in) & (R < r_out)],
                                     row["inc"], asymmetric_drift,
                                     beam_factor))
        rows.append(row)
    report(progress, n_rings, n_rings, "tilted rings")
    if len(rows) < 3:
        raise DataContentError(
            f"only {len(rows)} rings could be fitted; at least 3 are needed",
            hint="use wider rings or check the geometry and the mask")

    col = lambda key: np.array([row[key] for row in rows], dtype=float)  # noqa: E731
    r_mid = col("r")
    beam = (r_mid < 2.0 * psf) if psf else np.zeros(r_mid.size, dtype=bool)
    vrot, vrot_err = col("vrot"), col("vrot_err")
    sigma_r = sigma_r_err = vc = vc_err = None
    if asymmetric_drift is not None:
        sigma_r, sigma_r_err = col("sigma_r"), col("sigma_r_err")
        vc, vc_err = asymmetric_drift_vc(r_mid, vrot, vrot_err, sigma_r,
                                         sigma_r_err, asymmetric_drift)
    rings = RingTable(r_mid, col("r_in"), col("r_out"), vrot, vrot_err,
                      col("vrad"), col("vrad_err"), col("vsys"),
                      col("vsys_err"), col("pa"), col("pa_err"), col("inc"),
                      col("inc_err"), col("n").astype(int), col("chi2"), beam,
                      sigma_r, sigma_r_err, vc, vc_err)
    v_out, e_out = (vrot, vrot_err) if vc is None else (vc, vc_err)
    ok = np.isfinite(v_out) & np.isfinite(e_out) & (e_out > 0)
    if (~ok).any():
        notes.append(f"{int((~ok).sum())} rings without a finite circular "
                     "velocity were left out of the curve")
    if ok.sum() < 3:
        raise DataContentError("fewer than 3 rings with a usable velocity")
    if psf:
        notes.append(
            f"beam smearing not corrected: rings inside 2 x PSF FWHM "
            f"({2 * psf:.3g} arcsec) are flagged")
    else:
        notes.append("no PSF given: beam smearing could not be assessed")
    if asymmetric_drift is not None:
        notes.append(
            "asymmetric drift corrected (Binney & Tremaine 2008 §4.8.2; "
            f"h = {asymmetric_drift.scale_length_arcsec:g} arcsec, sigma_z/"
            f"sigma_R = {asymmetric_drift.sigma_z_over_sigma_r:g} assumed)")
    notes.append("inside a bar the tracer streams along it and V_rot is not "
                 "the circular velocity: flag the bar zone "
                 "(RotationCurve.with_flags) before computing resonances")
    source = "tilted rings" + (f" (free: {', '.join(free)})" if free else "")
    curve = RotationCurve(r_mid[ok], v_out[ok], e_out[ok],
                          rings.vrad_kms[ok] if fit_radial else None,
                          rings.vrad_err_kms[ok] if fit_radial else None,
                          beam[ok], "beam smearing (r < 2 PSF FWHM)" if
                          beam.any() else "", source, geometry.distance_mpc)
    if (vrot[ok] < 0).mean() > 0.5:
        warnings.warn("most rings rotate with negative V_rot: the PA probably "
                      "points to the approaching side (add 180 degrees)",
                      DataQualityWarning, stacklevel=2)
    return TiltedRingResult(curve, rings, geometry, free, tuple(notes))


def _ring_sigma_r(disp, cos_t, inc_deg, settings: AsymmetricDrift,
                  beam_factor: float) -> dict:
    """sigma_R of one ring from the line-of-sight dispersion (see
    :class:`AsymmetricDrift`): least squares for sigma_R^2 with
    ``sigma_los^2 = sigma_R^2 g(theta)``."""
    s2, c2 = math.sin(math.radians(inc_deg)) ** 2, math.cos(math.radians(inc_deg)) ** 2
    cos2 = cos_t**2
    g = (s2 * ((1.0 - cos2) + settings.sigma_phi2_over_sigma_r2 * cos2)
         + settings.sigma_z_over_sigma_r**2 * c2)
    y = disp**2
    s_r2 = float(np.sum(g * y) / np.sum(g * g))
    resid = y - s_r2 * g
    n = y.size
    var_s2 = float(np.sum(resid**2) / max(n - 1, 1) / np.sum(g * g))
    sigma_r = math.sqrt(max(s_r2, 0.0))
    sigma_r_err = (math.sqrt(var_s2) / (2.0 * sigma_r) * beam_factor
                   if sigma_r > 0 else np.inf)
    return {"sigma_r": sigma_r, "sigma_r_err": sigma_r_err}
