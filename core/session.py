"""Sessions: every setting of one measurement, in one human-readable file.

A :class:`Session` is a frozen dataclass holding everything
:func:`gyrometer.core.pipeline.run_session` needs: input files (with their
SHA-256 checksums once read), the moment settings for cubes, the disk
geometry (given, or ``None`` to estimate it), the slit set (explicit, or a
rule to generate one), the uncertainty settings with the random seed, the
rotation-curve source, the bar length and the outputs. The same pipeline
serves the desktop app, the notebook API and the command line.

File format
-----------
Sessions and recipes share one TOML layout (TOML v1.0; read with
:mod:`tomllib`, written by :func:`session_to_toml`, no pickle). A session
file starts with a table::

    [gyrometer-session]
    schema_version = 1

Recipes (written by hand, see :mod:`gyrometer.core.recipe`) use the same
sections without that table. Every key is described by :data:`SCHEMA`,
which drives the validator, the writer and the commented starter recipe.

Versions: this Gyrometer writes :data:`SESSION_SCHEMA_VERSION` = 1. Version 0
files (the pre-release draft layout: section ``[budget]`` with ``n_draws``,
and geometry keys ``pa``/``inc``) are migrated on reading; newer versions are
refused with a :class:`~gyrometer.core.errors.SessionError`.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import os
import sys
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

from .errors import GyrometerError, RecipeError, SessionError
from .budget import BudgetSettings
from .geometry import DiskGeometry
from .moments import MASK_METHODS, CONTINUUM_METHODS, MomentSettings
from .radial import REGULARISATIONS, RadialSettings
from .stellar import DEFAULT_SKY_LINES_A, StellarSettings
from .safeio import write_text_atomic
from .slits import Slit, SlitSet

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = [
    "SESSION_SCHEMA",
    "SESSION_SCHEMA_VERSION",
    "InputSpec",
    "MomentSettings",  # re-exported from gyrometer.core.moments
    "SlitSpec",
    "BudgetSettings",  # re-exported from gyrometer.core.budget
    "RotationSettings",
    "BarSettings",
    "OutputSettings",
    "RadialSettings",  # re-exported from gyrometer.core.radial
    "StellarSettings",  # re-exported from gyrometer.core.stellar
    "AbsorptionSettings",
    "Session",
    "SCHEMA",
    "KeySpec",
    "session_from_dict",
    "session_to_dict",
    "session_to_toml",
    "save_session",
    "load_session",
    "read_toml",
    "migrate",
    "sha256_file",
]

SESSION_SCHEMA = "gyrometer-session"
SESSION_SCHEMA_VERSION = 1

#: Error terms of the uncertainty budget understood by the pipeline.
BUDGET_TERMS = ("noise", "slit bootstrap", "position angle", "centre",
                "inclination")
#: Recipe term name -> switch of :class:`gyrometer.core.budget.BudgetSettings`.
_TERM_FLAGS = {"noise": "noise", "slit bootstrap": "bootstrap",
               "position angle": "position_angle", "centre": "centre",
               "inclination": "inclination"}
ROUTES = ("maps", "cube", "absorption")
RC_SOURCES = ("derived", "file", "none")
RC_MODELS = ("best", "arctan", "polyex", "disk+halo", "bertola", "spline")
OUTPUT_FORMATS = ("ecsv", "csv", "json", "tex")
FIGURE_FORMATS = ("png", "pdf", "svg")
FIGURE_KINDS = ("map", "fit", "convergence", "pa", "rotation", "radial")
from .dataset import TRACERS  # noqa: E402  (after the constants it sits with)


# -- settings dataclasses -----------------------------------------------------
@dataclass(frozen=True)
class InputSpec:
    """Input files of a measurement.

    Attributes
    ----------
    kind : {"maps", "cube", "absorption"}
        Maps (intensity + velocity), one emission-line cube, or one
        absorption-line cube (wavelength axis; slit spectra fitted, see
        :mod:`gyrometer.core.stellar` and the ``[stellar]`` section).
    maps : str
        One multi-extension FITS file holding the maps (extensions named
        INTENSITY/FLUX, VELOCITY/VEL ..., see
        :func:`gyrometer.core.fitsio.load_mapset`).
    intensity, velocity, intensity_error, velocity_error : str
        FITS files of the maps route (errors optional, ``""`` = none).
    cube : str
        FITS cube of the cube and absorption routes.
    sha256 : tuple of (str, str)
        ``(role, hex digest)`` of every input as read (filled by the
        pipeline; checked when a session is re-run).
    """

    kind: str = "maps"
    maps: str = ""
    intensity: str = ""
    velocity: str = ""
    intensity_error: str = ""
    velocity_error: str = ""
    cube: str = ""
    sha256: tuple[tuple[str, str], ...] = ()

    def files(self) -> dict[str, str]:
        """``{role: path}`` of the files this route reads (non-empty only)."""
        roles = (("cube",) if self.kind in ("cube", "absorption") else
                 ("maps", "intensity", "velocity", "intensity_error",
                  "velocity_error"))
        return {r: getattr(self, r) for r in roles if getattr(self, r)}


@dataclass(frozen=True)
class SlitSpec:
    """Rule for making slits when no explicit list is given.

    Attributes
    ----------
    count : int
        Number of slits (0 = choose from the data: spacing >= PSF FWHM).
    spacing_arcsec, width_arcsec : float
        Centre-to-centre spacing and full width (0 = the PSF FWHM or two
        pixels, whichever is larger).
    half_length_arcsec : float
        Half-length along the line of nodes (0 = to the edge of the data).
    """

    count: int = 0
    spacing_arcsec: float = 0.0
    width_arcsec: float = 0.0
    half_length_arcsec: float = 0.0


@dataclass(frozen=True)
class RotationSettings:
    """Where the rotation curve comes from.

    Attributes
    ----------
    source : {"derived", "file", "none"}
        Fit the velocity map (``derived``), read a two- or three-column
        text file of R (arcsec), V (km/s) [, error] (``file``), or skip
        resonances (``none``).
    file : str
        The text file for ``source = "file"``.
    radius_unit : str
        Unit of the file's radius column when its header does not say.
    model : str
        Smooth model fitted to the curve (one of :data:`RC_MODELS`;
        ``"best"`` = lowest BIC of all).
    """

    source: str = "derived"
    file: str = ""
    radius_unit: str = "arcsec"
    model: str = "best"


@dataclass(frozen=True)
class BarSettings:
    """Bar length and orientation.

    Attributes
    ----------
    length_arcsec : float or None
        Bar half-length (semi-major axis); ``None`` = estimate it from the
        intensity map (Fourier method of :mod:`gyrometer.core.bars`);
        ``0`` = no bar length (no R).
    length_err_arcsec : float
        Its 1-sigma error.
    on_sky : bool
        The given length was measured on the sky (projected); it is then
        deprojected with the bar's sky position angle ``pa_deg``. False:
        the length is already deprojected to the disk plane.
    pa_deg : float or None
        Sky position angle of the bar, N through E (``None`` = estimate).
    """

    length_arcsec: float | None = None
    length_err_arcsec: float = 0.0
    on_sky: bool = False
    pa_deg: float | None = None


@dataclass(frozen=True)
class AbsorptionSettings:
    """Settings of the absorption-line route (``[input] kind = "absorption"``).

    Attributes
    ----------
    stellar : gyrometer.core.stellar.StellarSettings
        Fit window, continuum band, masks, polynomial degrees, template and
        the noise Monte Carlo draws per slit (``n_mc``).
    geometry_draws : int
        Re-measurements of the slit spectra with the position angle (and,
        separately, the centre) drawn from their errors, for the geometry
        terms of the uncertainty budget (0 = leave those terms out). Each
        draw refits every slit spectrum, so this is kept small.
    """

    stellar: StellarSettings = field(default_factory=StellarSettings)
    geometry_draws: int = 30


@dataclass(frozen=True)
class OutputSettings:
    """What is written and where.

    Attributes
    ----------
    folder : str
        Output folder.
    stem : str
        File-name stem (``""`` = the galaxy name).
    tables : tuple of str
        Results formats (subset of :data:`OUTPUT_FORMATS`).
    latex_style : {"aastex", "tabular"}
    figures : tuple of str
        Figure file formats (subset of :data:`FIGURE_FORMATS`).
    figure_kinds : tuple of str
        Which figures (subset of :data:`FIGURE_KINDS`).
    regions : {"ds9", "crtf", "none"}
        Slit region file format.
    session : bool
        Write the resolved session file next to the results.
    """

    folder: str = "gyrometer-output"
    stem: str = ""
    tables: tuple[str, ...] = OUTPUT_FORMATS
    latex_style: str = "aastex"
    figures: tuple[str, ...] = ("png", "pdf")
    figure_kinds: tuple[str, ...] = FIGURE_KINDS
    regions: str = "ds9"
    session: bool = True


@dataclass(frozen=True)
class Session:
    """Everything one measurement needs; see the module docstring.

    Attributes
    ----------
    name : str
        Galaxy name (``""`` = from the data).
    tracer : str
        One of :data:`gyrometer.core.dataset.TRACERS`.
    input : InputSpec
    moments : gyrometer.core.moments.MomentSettings
        Cube route only: line, velocity window, mask (the window is centred
        on the systemic velocity of the geometry).
    geometry : DiskGeometry or None
        ``None`` = estimate from the velocity map.
    geometry_guess : tuple of (str, float)
        With ``geometry = None``: the values the recipe gave anyway
        (starting guesses; the distance and the 1-sigma errors are used as
        given, since a velocity map cannot tell them).
    slits : SlitSet or None
        Explicit slits; ``None`` = make them with ``slit_rule``.
    slit_rule : SlitSpec
    symmetric : bool
        Mirror masks and truncate slits symmetrically about the minor axis.
    budget : gyrometer.core.budget.BudgetSettings
        Monte Carlo draws, seed and error sources; the sigmas of the
        geometry terms come from the geometry's ``*_err`` fields.
    rotation : RotationSettings
    bar : BarSettings
    radial : gyrometer.core.radial.RadialSettings or None
        Pattern speed against radius (``[radial] enabled = true``); None =
        not measured.
    absorption : AbsorptionSettings
        Used by the absorption route only.
    output : OutputSettings
    schema_version : int
    """

    name: str = ""
    tracer: str = "stars"
    input: InputSpec = field(default_factory=InputSpec)
    moments: MomentSettings = field(default_factory=MomentSettings)
    geometry: DiskGeometry | None = None
    geometry_guess: tuple[tuple[str, float], ...] = ()
    slits: SlitSet | None = None
    slit_rule: SlitSpec = field(default_factory=SlitSpec)
    symmetric: bool = True
    budget: BudgetSettings = field(default_factory=lambda: BudgetSettings(
        n_draws=500, seed=20261201))
    rotation: RotationSettings = field(default_factory=RotationSettings)
    bar: BarSettings = field(default_factory=BarSettings)
    radial: RadialSettings | None = None
    absorption: AbsorptionSettings = field(default_factory=AbsorptionSettings)
    output: OutputSettings = field(default_factory=OutputSettings)
    schema_version: int = SESSION_SCHEMA_VERSION

    def with_(self, **changes) -> "Session":
        """A copy with some fields changed."""
        return replace(self, **changes)

    def to_toml(self) -> str:
        """The session file text (see :func:`session_to_toml`)."""
        return session_to_toml(self)

    @classmethod
    def from_toml(cls, text: str, *, base_dir: str | os.PathLike = ".",
                  source: str = "<text>") -> "Session":
        """Parse session text (migrating version 0)."""
        doc = _parse_toml(text, source, SessionError)
        return _session_from_file_doc(doc, Path(base_dir), source)


# -- schema -------------------------------------------------------------------
@dataclass(frozen=True)
class KeySpec:
    """One key of a recipe or session file.

    Attributes
    ----------
    name : str
        Key name within its section.
    kind : str
        ``"str"``, ``"path"``, ``"float"``, ``"int"``, ``"bool"``,
        ``"float?"`` (a number or absent), ``"float|estimate"`` (a number or
        the string ``"estimate"``), ``"float|gcv"`` (a number or ``"gcv"``),
        ``"list"`` (list of strings), ``"floats"`` (list of numbers),
        ``"floats?"`` (list of numbers or absent), ``"pairs"`` (list of
        ``[low, high]`` number pairs), ``"signed int"`` (any integer).
    default : object
        Value when absent (``None`` = absent/estimate).
    doc : str
        One-line help, used for the starter recipe's comments.
    choices : tuple
        Allowed values (for strings and list items).
    """

    name: str
    kind: str
    default: Any
    doc: str
    choices: tuple = ()


_GEOMETRY_KEYS = (
    KeySpec("mode", "str", "given", "'given': use the values below; "
            "'estimate': fit them to the velocity map (values below, if any, "
            "are starting guesses)", ("given", "estimate")),
    KeySpec("ra_deg", "float?", None, "disk centre, right ascension (ICRS, deg)"),
    KeySpec("dec_deg", "float?", None, "disk centre, declination (ICRS, deg)"),
    KeySpec("pa_deg", "float?", None, "position angle of the RECEDING half of "
            "the line of nodes, north through east (deg)"),
    KeySpec("inc_deg", "float?", None, "inclination, 0 = face-on (deg)"),
    KeySpec("vsys_kms", "float?", None, "systemic velocity, in the data's "
            "velocity convention (km/s)"),
    KeySpec("distance_mpc", "float?", None, "distance (Mpc); needed for "
            "km/s/kpc and kpc radii"),
    KeySpec("center_err_arcsec", "float", 0.0, "1-sigma error of the centre (arcsec)"),
    KeySpec("pa_err_deg", "float", 0.0, "1-sigma error of the position angle (deg)"),
    KeySpec("inc_err_deg", "float", 0.0, "1-sigma error of the inclination (deg)"),
    KeySpec("vsys_err_kms", "float", 0.0, "1-sigma error of the systemic velocity (km/s)"),
    KeySpec("distance_err_mpc", "float", 0.0, "1-sigma error of the distance (Mpc)"),
    KeySpec("source", "str", "recipe", "where the values come from (free "
            "text, kept in the results metadata)"),
)

#: Every section and key of a recipe / session file, in file order.
SCHEMA: dict[str, tuple[KeySpec, ...]] = {
    "galaxy": (
        KeySpec("name", "str", "", "galaxy name used in tables and file "
                "names ('' = from the data header)"),
        KeySpec("tracer", "str", "stars", "kinematic tracer; gas tracers get "
                "a caveat (continuity may not hold)", TRACERS),
    ),
    "input": (
        KeySpec("kind", "str", "maps", "'maps' (intensity + velocity FITS "
                "maps), 'cube' (one spectral cube, emission line) or 'absorption' (a stellar absorption-line cube)", ROUTES),
        KeySpec("maps", "path", "", "one multi-extension FITS file with the "
                "maps (INTENSITY, VELOCITY [, *_ERR] extensions)"),
        KeySpec("intensity", "path", "", "FITS map of the tracer's surface "
                "brightness (maps route; overrides the one in 'maps')"),
        KeySpec("velocity", "path", "", "FITS map of the line-of-sight "
                "velocity, km/s (maps route; overrides 'maps')"),
        KeySpec("intensity_error", "path", "", "FITS map of the intensity's "
                "1-sigma error (optional, '' = none)"),
        KeySpec("velocity_error", "path", "", "FITS map of the velocity's "
                "1-sigma error (optional, '' = none)"),
        KeySpec("cube", "path", "", "FITS spectral cube (cube route)"),
    ),
    "moments": (
        KeySpec("line", "str?", None, "emission line for the rest value, "
                "e.g. 'Halpha', 'HI', 'CO(1-0)' ('' = from the header)"),
        KeySpec("rest_value", "float?", None, "rest frequency or wavelength "
                "(unit below); overrides 'line' and the header"),
        KeySpec("rest_unit", "str", "", "unit of rest_value ('Angstrom', "
                "'GHz', 'Hz' ...)"),
        KeySpec("rest_air", "bool", False, "rest_value is an air wavelength"),
        KeySpec("convention", "str?", None, "velocity convention ('' = the "
                "axis's own)", ("", "radio", "optical", "relativistic")),
        KeySpec("window_halfwidth_kms", "float", 500.0, "half-width of the "
                "velocity window around the systemic velocity (km/s)"),
        KeySpec("mask", "str", "smooth", "'smooth' (smooth, clip, dilate) or "
                "'none' (every channel in the window)", MASK_METHODS),
        KeySpec("snr_threshold", "float", 4.0, "clip level of the smoothed "
                "cube, in units of its noise"),
        KeySpec("smooth_fwhm_pix", "float?", None, "spatial smoothing FWHM "
                "for the mask, pixels (default: the PSF)"),
        KeySpec("smooth_channels", "int", 3, "spectral boxcar width for the "
                "mask (odd)"),
        KeySpec("dilation_channels", "int", 2, "mask growth along the spectrum"),
        KeySpec("dilation_pixels", "int", 1, "mask growth on the sky"),
        KeySpec("continuum", "str", "auto", "continuum handling",
                CONTINUUM_METHODS),
        KeySpec("noise_channels", "int", 30, "sideband channels per side for "
                "the noise"),
        KeySpec("air_method", "str", "morton", "air/vacuum formula",
                ("morton", "ciddor", "greisen")),
    ),
    "geometry": _GEOMETRY_KEYS,
    "slits": (
        KeySpec("count", "int", 0, "number of slits (0 = as many as fit at "
                "one PSF spacing)"),
        KeySpec("spacing_arcsec", "float", 0.0, "centre-to-centre spacing "
                "(arcsec; 0 = the PSF FWHM)"),
        KeySpec("width_arcsec", "float", 0.0, "full slit width (arcsec; "
                "0 = the spacing)"),
        KeySpec("half_length_arcsec", "float", 0.0, "half-length along the "
                "line of nodes (arcsec; 0 = to the data edge)"),
        KeySpec("symmetric", "bool", True, "mirror masks X -> -X and truncate "
                "slits symmetrically (recommended)"),
    ),
    "uncertainty": (
        KeySpec("draws", "int", 500, "Monte Carlo draws per error source "
                "(and for the resonance radii)"),
        KeySpec("seed", "int", 20261201, "random seed; the same seed and "
                "inputs reproduce the same numbers"),
        KeySpec("workers", "int", 1, "processes for the geometry draws"),
        KeySpec("terms", "list", list(BUDGET_TERMS), "error sources to "
                "sample", BUDGET_TERMS),
    ),
    "rotation_curve": (
        KeySpec("source", "str", "derived", "'derived' (tilted rings on the "
                "velocity map), 'file' (a table) or 'none' (no resonances)",
                RC_SOURCES),
        KeySpec("file", "path", "", "rotation-curve table (ECSV, CSV or text "
                "with a header naming radius, velocity and error columns)"),
        KeySpec("radius_unit", "str", "arcsec", "unit of the file's radius "
                "column when the header does not say", ("arcsec", "kpc", "pc")),
        KeySpec("model", "str", "best", "smooth model for Omega and kappa "
                "('best' = lowest BIC)", RC_MODELS),
    ),
    "bar": (
        KeySpec("length_arcsec", "float|estimate", None, "bar half-length "
                "(semi-major axis, arcsec), 'estimate' (Fourier analysis of "
                "the intensity map), or 0 for none (no R)"),
        KeySpec("length_err_arcsec", "float", 0.0, "1-sigma error of the bar "
                "length (arcsec)"),
        KeySpec("on_sky", "bool", False, "true: the length was measured on "
                "the sky and is deprojected with pa_deg; false: it is "
                "already deprojected"),
        KeySpec("pa_deg", "float|estimate", None, "sky position angle of the "
                "bar, north through east (deg) or 'estimate'"),
    ),
    "radial": (
        KeySpec("enabled", "bool", False, "also measure the pattern speed "
                "against radius (radial Tremaine-Weinberg: Merrifield, Rand & "
                "Meidt 2006; Meidt et al. 2008) with the same slits"),
        KeySpec("n_annuli", "int", 0, "equal-width annuli from the centre to "
                "the outermost slit (0 = one annulus per slit pair, starting "
                "at its inner radius)"),
        KeySpec("edges_arcsec", "floats", [], "explicit annulus edges, disk-"
                "plane radius (arcsec, increasing; [] = use n_annuli)"),
        KeySpec("regularisation", "str", "tikhonov-1st-difference",
                "smoothing of Omega_p(R)", REGULARISATIONS),
        KeySpec("lam", "float|gcv", "gcv", "regularisation strength "
                "(dimensionless) or 'gcv' (generalised cross-validation)"),
        KeySpec("fit_vsys_offset", "bool", False, "fit a correction to the "
                "systemic velocity (needs slits on both sides)"),
        KeySpec("n_mc", "int", 0, "noise Monte Carlo draws (0 = linear "
                "error propagation)"),
        KeySpec("oversample", "int", 2, "slit samples per pixel (1-8)"),
    ),
    "stellar": (
        KeySpec("fit_window_A", "floats", [], "absorption route: observed "
                "wavelength range fitted, [low, high] Angstrom ([] = the "
                "cube less 1 % at each end)"),
        KeySpec("continuum_band_A", "floats", [], "observed band whose "
                "integrated light is the surface brightness, [low, high] "
                "Angstrom ([] = the fit window)"),
        KeySpec("emission_lines_A", "floats?", None, "rest wavelengths of "
                "emission lines to mask (Angstrom; absent = the built-in "
                "ionised-gas lines)"),
        KeySpec("emission_halfwidth_kms", "float", 400.0, "half-width of "
                "each emission-line mask (km/s)"),
        KeySpec("sky_lines_A", "floats", list(DEFAULT_SKY_LINES_A),
                "observed wavelengths of sky lines to mask (Angstrom)"),
        KeySpec("sky_halfwidth_A", "float", 4.0, "half-width of each sky "
                "mask (Angstrom)"),
        KeySpec("mask_ranges_A", "pairs", [], "further observed ranges to "
                "mask, [[low, high], ...] Angstrom"),
        KeySpec("multiplicative_degree", "signed int", 3, "degree of the "
                "multiplicative Legendre polynomial (-1 = none)"),
        KeySpec("additive_degree", "signed int", -1, "degree of the additive "
                "Legendre polynomial (-1 = none)"),
        KeySpec("n_hermite", "int", 2, "Gauss-Hermite terms beyond the "
                "Gaussian: 0, 2 (h3, h4) or 4", (0, 2, 4)),
        KeySpec("losvd", "str", "binned", "whose first moment is <V>",
                ("binned", "gauss-hermite")),
        KeySpec("v_range_kms", "float", 800.0, "search range of the mean "
                "velocity about V_sys (km/s)"),
        KeySpec("template", "str", "galaxy", "'galaxy' (stacked central "
                "spectra) or the path of a 1D FITS template spectrum"),
        KeySpec("template_radius_arcsec", "float", 1.5, "radius of the "
                "central aperture of a galaxy template (arcsec)"),
        KeySpec("n_mc", "int", 30, "noise Monte Carlo draws of every slit "
                "spectrum (the 'noise' term of the budget)"),
        KeySpec("geometry_draws", "int", 30, "re-measurements with the PA, "
                "and separately the centre, drawn from their errors (the "
                "geometry terms of the budget; 0 = leave them out)"),
    ),
    "output": (
        KeySpec("folder", "path", "gyrometer-output", "output folder "
                "(relative to this file)"),
        KeySpec("stem", "str", "", "file-name stem ('' = the galaxy name)"),
        KeySpec("tables", "list", list(OUTPUT_FORMATS), "results formats",
                OUTPUT_FORMATS),
        KeySpec("latex_style", "str", "aastex", "LaTeX table style",
                ("aastex", "tabular")),
        KeySpec("figures", "list", ["png", "pdf"], "figure file formats "
                "([] = no figures)", FIGURE_FORMATS),
        KeySpec("figure_kinds", "list", list(FIGURE_KINDS), "which figures",
                FIGURE_KINDS),
        KeySpec("regions", "str", "ds9", "slit region file format",
                ("ds9", "crtf", "none")),
        KeySpec("session", "bool", True, "also write the session file that "
                "reproduces this result"),
    ),
}

#: Sections that may appear only in session files.
_SESSION_ONLY = ("gyrometer-session",)


# -- helpers ------------------------------------------------------------------
def sha256_file(path: str | os.PathLike, chunk: int = 1 << 22) -> str:
    """Hex SHA-256 digest of a file, read in 4 MiB chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(chunk), b""):
            digest.update(block)
    return digest.hexdigest()


def _suggest(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f"did you mean '{close[0]}'?" if close else \
        f"known keys: {', '.join(options)}"


def _parse_toml(text: str, source: str, error=RecipeError) -> dict:
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise error(f"not valid TOML ({exc})", path=source,
                    hint="see https://toml.io for the syntax") from exc


def read_toml(path: str | os.PathLike, error=RecipeError) -> dict:
    """Parse a TOML file; errors become ``error`` naming the file."""
    p = Path(path)
    if not p.is_file():
        raise error("file not found", path=str(p))
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise error(f"cannot read the file ({exc})", path=str(p)) from exc
    return _parse_toml(text, str(p), error)


def _type_name(value: Any) -> str:
    return {bool: "true/false", int: "an integer", float: "a number",
            str: "a string", list: "a list", dict: "a table"}.get(
                type(value), type(value).__name__)


def _check_value(spec: KeySpec, value: Any, dotted: str, source: str,
                 base_dir: Path, check_files: bool, error) -> Any:
    def fail(expected: str) -> None:
        raise error(f"must be {expected}, not {_type_name(value)} "
                    f"({value!r})", path=source, keyword=dotted, value=value)

    kind = spec.kind
    if kind in ("float", "float?"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            fail("a number")
        if not math.isfinite(value):
            fail("a finite number")
        return float(value)
    if kind == "float|estimate":
        if isinstance(value, str):
            if value != "estimate":
                raise error("must be a number or 'estimate'", path=source,
                            keyword=dotted, value=value)
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value):
            fail("a number or 'estimate'")
        return float(value)
    if kind == "float|gcv":
        if isinstance(value, str):
            if value != "gcv":
                raise error("must be a number or 'gcv'", path=source,
                            keyword=dotted, value=value)
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value) or value < 0:
            fail("a non-negative number or 'gcv'")
        return float(value)
    if kind in ("floats", "floats?"):
        if not isinstance(value, list) or not all(
                isinstance(v, (int, float)) and not isinstance(v, bool)
                and math.isfinite(v) for v in value):
            fail("a list of numbers")
        return tuple(float(v) for v in value)
    if kind == "pairs":
        if not isinstance(value, list) or not all(
                isinstance(p, list) and len(p) == 2 and all(
                    isinstance(v, (int, float)) and not isinstance(v, bool)
                    and math.isfinite(v) for v in p) for p in value):
            fail("a list of [low, high] number pairs")
        return tuple((float(a), float(b)) for a, b in value)
    if kind in ("int", "signed int"):
        if isinstance(value, bool) or not isinstance(value, int):
            fail("an integer")
        if value < 0 and kind == "int":
            raise error("must not be negative", path=source, keyword=dotted,
                        value=value)
        if spec.choices and value not in spec.choices:
            raise error(f"must be one of {', '.join(map(str, spec.choices))}",
                        path=source, keyword=dotted, value=value)
        return int(value)
    if kind == "bool":
        if not isinstance(value, bool):
            fail("true or false")
        return value
    if kind == "str?":
        if not isinstance(value, str):
            fail("a string (in quotes)")
        if spec.choices and value not in spec.choices:
            raise error(f"must be one of {', '.join(map(repr, spec.choices))}",
                        path=source, keyword=dotted, value=value)
        return value or None
    if kind in ("str", "path"):
        if not isinstance(value, str):
            fail("a string (in quotes)")
        if spec.choices and value not in spec.choices:
            raise error(f"must be one of {', '.join(map(repr, spec.choices))}"
                        f"; {_suggest(value, spec.choices).replace('known keys', 'choices')}",
                        path=source, keyword=dotted, value=value)
        if kind == "path" and value:
            full = (base_dir / value).expanduser() if not \
                Path(value).expanduser().is_absolute() else Path(value).expanduser()
            return str(full)
        return value
    if kind == "list":
        if not isinstance(value, list) or not all(isinstance(v, str)
                                                  for v in value):
            fail("a list of strings")
        for item in value:
            if spec.choices and item not in spec.choices:
                raise error(f"unknown entry {item!r}; allowed: "
                            f"{', '.join(map(repr, spec.choices))}",
                            path=source, keyword=dotted, value=item)
        return tuple(value)
    raise AssertionError(kind)  # pragma: no cover


def _section_values(doc: dict, section: str, source: str, base_dir: Path,
                    check_files: bool, error) -> dict[str, Any]:
    specs = {s.name: s for s in SCHEMA[section]}
    raw = doc.get(section, {})
    if not isinstance(raw, dict):
        raise error(f"must be a table ([{section}])", path=source,
                    keyword=section)
    out: dict[str, Any] = {}
    for key, value in raw.items():
        dotted = f"{section}.{key}"
        if section == "slits" and key == "slit":
            continue  # the explicit slit list, handled separately
        if key == "sha256" and section == "input":
            continue
        if key not in specs:
            raise error(f"unknown key; {_suggest(key, specs)}", path=source,
                        keyword=dotted)
        out[key] = _check_value(specs[key], value, dotted, source, base_dir,
                                check_files, error)
    for name, spec in specs.items():
        if name not in out:
            default = spec.default
            if spec.kind == "path" and default:
                default = str(base_dir / default)
            out[name] = tuple(default) if isinstance(default, list) else default
    return out


def _explicit_slits(doc: dict, source: str, symmetric: bool, error
                    ) -> SlitSet | None:
    raw = doc.get("slits", {})
    if not isinstance(raw, dict) or "slit" not in raw:
        return None
    items = raw["slit"]
    if not isinstance(items, list) or not all(isinstance(i, dict)
                                              for i in items):
        raise error("must be an array of tables ([[slits.slit]])",
                    path=source, keyword="slits.slit")
    names = [f.name for f in fields(Slit)]
    slits = []
    for k, item in enumerate(items, start=1):
        for key, value in item.items():
            dotted = f"slits.slit[{k}].{key}"
            if key not in names:
                raise error(f"unknown key; {_suggest(key, names)}",
                            path=source, keyword=dotted)
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise error(f"must be a number, not {_type_name(value)}",
                            path=source, keyword=dotted, value=value)
        for key in ("offset_arcsec", "width_arcsec", "half_length_arcsec"):
            if key not in item:
                raise error("missing key", path=source,
                            keyword=f"slits.slit[{k}].{key}")
        try:
            slits.append(Slit(**{k_: float(v) for k_, v in item.items()}))
        except GyrometerError as exc:
            raise error(exc.message, path=source,
                        keyword=f"slits.slit[{k}].{exc.keyword or ''}".rstrip(".")
                        ) from exc
    if not slits:
        raise error("an explicit slit list is empty", path=source,
                    keyword="slits.slit")
    return SlitSet(tuple(slits), symmetric=symmetric)


def _check_files(spec: InputSpec, rotation: RotationSettings, source: str,
                 error) -> None:
    roles = spec.files()
    if spec.kind == "maps":
        for needed in ("intensity", "velocity"):
            if needed not in roles and "maps" not in roles:
                raise error("the maps route needs this file (or input.maps)",
                            path=source, keyword=f"input.{needed}",
                            hint="or set input.kind = 'cube' and input.cube")
    elif "cube" not in roles:
        raise error(f"the {spec.kind} route needs this file", path=source,
                    keyword="input.cube")
    items = [(f"input.{r}", p) for r, p in roles.items()]
    if rotation.source == "file":
        if not rotation.file:
            raise error("source = 'file' needs a file", path=source,
                        keyword="rotation_curve.file")
        items.append(("rotation_curve.file", rotation.file))
    for dotted, p in items:
        if not Path(p).is_file():
            raise error(f"file not found: {p}", path=source, keyword=dotted)


def session_from_dict(doc: dict, *, base_dir: str | os.PathLike = ".",
                      source: str = "<recipe>", check_files: bool = True,
                      error=RecipeError) -> Session:
    """Validate a recipe/session mapping and build a :class:`Session`.

    Parameters
    ----------
    doc : dict
        Parsed TOML.
    base_dir : path-like
        Folder that relative paths are relative to (the file's folder).
    source : str
        File name used in messages.
    check_files : bool
        Require the input files to exist.
    error : type
        Exception class raised (:class:`RecipeError` or
        :class:`SessionError`); its ``keyword`` is the dotted key name.
    """
    base = Path(base_dir)
    if not isinstance(doc, dict):
        raise error("the file must hold TOML tables", path=source)
    known = list(SCHEMA) + list(_SESSION_ONLY)
    for section in doc:
        if section not in known:
            raise error(f"unknown section; {_suggest(section, known)}",
                        path=source, keyword=section)
    v = {s: _section_values(doc, s, source, base, check_files, error)
         for s in SCHEMA}
    sha = doc.get("input", {}).get("sha256", {})
    if not isinstance(sha, dict) or not all(isinstance(x, str)
                                            for x in sha.values()):
        raise error("must be a table of role = 'hex digest'", path=source,
                    keyword="input.sha256")
    inp = InputSpec(**v["input"], sha256=tuple(sorted(sha.items())))
    geo = v["geometry"]
    mode = geo.pop("mode")
    geo_source = geo.pop("source")
    geometry = None
    guess: tuple[tuple[str, float], ...] = ()
    if mode == "estimate":
        guess = tuple((k, float(val)) for k, val in geo.items()
                      if val is not None and not ("_err_" in k and val == 0.0))
    if mode == "given":
        for key in ("ra_deg", "dec_deg", "pa_deg", "inc_deg"):
            if geo[key] is None:
                raise error("needed when geometry.mode = 'given'",
                            path=source, keyword=f"geometry.{key}",
                            hint="give it, or set geometry.mode = 'estimate'")
        if geo["vsys_kms"] is None:
            geo["vsys_kms"] = 0.0
        try:
            geometry = DiskGeometry(**geo, source=geo_source)
        except GyrometerError as exc:
            raise error(exc.message, path=source,
                        keyword=f"geometry.{exc.keyword}", value=exc.value,
                        hint=exc.hint) from exc
    sl = v["slits"]
    symmetric = sl.pop("symmetric")
    slits = _explicit_slits(doc, source, symmetric, error)
    rotation = RotationSettings(**v["rotation_curve"])
    bar = v["bar"]
    raw_bar = doc.get("bar", {})
    length = bar["length_arcsec"]
    if length is not None and length < 0:
        raise error("must not be negative", path=source,
                    keyword="bar.length_arcsec", value=length)
    if "length_arcsec" not in raw_bar:
        length = None  # default: estimate
    if check_files:
        _check_files(inp, rotation, source, error)
    out = v["output"]
    unc = v["uncertainty"]
    if unc["draws"] < 10:
        raise error("needs at least 10 draws for percentiles", path=source,
                    keyword="uncertainty.draws", value=unc["draws"])
    if unc["workers"] < 1:
        raise error("needs at least 1 worker", path=source,
                    keyword="uncertainty.workers", value=unc["workers"])
    budget = BudgetSettings(
        n_draws=unc["draws"], seed=unc["seed"], workers=unc["workers"],
        **{flag: term in unc["terms"] for term, flag in _TERM_FLAGS.items()})
    try:
        moments = MomentSettings(**v["moments"])
    except GyrometerError as exc:
        raise error(exc.message.replace("moment setting ", ""), path=source,
                    keyword=f"moments.{exc.keyword}", value=exc.value) from exc
    if inp.kind == "absorption" and geometry is None:
        raise error("the absorption route needs a given geometry (there is "
                    "no velocity map to estimate it from)", path=source,
                    keyword="geometry.mode", value=mode,
                    hint="set geometry.mode = 'given' with centre, PA, "
                         "inclination and V_sys")
    radial = _radial_settings(v["radial"], source, error)
    absorption = _absorption_settings(v["stellar"], base, source, error)
    session = Session(
        name=v["galaxy"]["name"], tracer=v["galaxy"]["tracer"], input=inp,
        moments=moments, geometry=geometry,
        geometry_guess=guess,
        slits=slits, slit_rule=SlitSpec(**sl), symmetric=symmetric,
        budget=budget, rotation=rotation,
        bar=BarSettings(length_arcsec=length,
                        length_err_arcsec=bar["length_err_arcsec"],
                        on_sky=bar["on_sky"], pa_deg=bar["pa_deg"]),
        radial=radial, absorption=absorption,
        output=OutputSettings(**out))
    return session


def _radial_settings(values: dict, source: str, error) -> RadialSettings | None:
    """The ``[radial]`` section as :class:`RadialSettings` (None = disabled).

    The section is validated even when disabled, so a typo is found before
    it is switched on.
    """
    try:
        settings = RadialSettings(
            edges_arcsec=values["edges_arcsec"] or None,
            n_annuli=values["n_annuli"] or None,
            regularisation=values["regularisation"], lam=values["lam"],
            fit_vsys_offset=values["fit_vsys_offset"], n_mc=values["n_mc"],
            oversample=values["oversample"] or 2)
    except GyrometerError as exc:
        raise error(exc.message, path=source,
                    keyword=f"radial.{exc.keyword or ''}".rstrip("."),
                    value=exc.value, hint=exc.hint) from exc
    return settings if values["enabled"] else None


def _absorption_settings(values: dict, base: Path, source: str,
                         error) -> AbsorptionSettings:
    """The ``[stellar]`` section as :class:`AbsorptionSettings`."""
    values = dict(values)
    geometry_draws = values.pop("geometry_draws")
    for key in ("fit_window_A", "continuum_band_A"):
        band = values[key]
        if band and len(band) != 2:
            raise error("must be [low, high] in Angstrom, or [] for the "
                        "default", path=source, keyword=f"stellar.{key}",
                        value=list(band))
        values[key] = band or None
    template = values["template"]
    if template != "galaxy":
        full = Path(template).expanduser()
        values["template"] = str(full if full.is_absolute() else base / full)
    if geometry_draws == 1:
        raise error("needs 0 (no geometry terms) or at least 2 draws",
                    path=source, keyword="stellar.geometry_draws", value=1)
    try:
        stellar = StellarSettings(**values)
    except GyrometerError as exc:
        raise error(exc.message, path=source,
                    keyword=f"stellar.{exc.keyword or ''}".rstrip("."),
                    value=exc.value, hint=exc.hint) from exc
    return AbsorptionSettings(stellar, geometry_draws)


# -- writing ------------------------------------------------------------------
def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        text = repr(value)  # shortest round-trip representation
        return text if any(c in text for c in ".en") else text + ".0"
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)  # a valid TOML basic string
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {type(value).__name__} to TOML")


def session_to_dict(session: Session) -> dict[str, dict[str, Any]]:
    """The session as nested plain data, keyed like the file.

    Absent values (``None``) are left out; ``geometry.mode`` and
    ``bar.length_arcsec`` say ``"estimate"`` where the pipeline estimates.
    """
    g = session.geometry
    if g is None:
        geometry: dict[str, Any] = {"mode": "estimate",
                                    **dict(session.geometry_guess)}
    else:
        geometry = {"mode": "given"}
        for spec in _GEOMETRY_KEYS[1:]:
            geometry[spec.name] = getattr(g, spec.name)
    bar = session.bar
    doc: dict[str, dict[str, Any]] = {
        "galaxy": {"name": session.name, "tracer": session.tracer},
        "input": {f.name: getattr(session.input, f.name)
                  for f in fields(InputSpec) if f.name != "sha256"},
        "moments": {spec.name: getattr(session.moments, spec.name)
                    for spec in SCHEMA["moments"]},
        "geometry": geometry,
        "slits": {**{f.name: getattr(session.slit_rule, f.name)
                     for f in fields(SlitSpec)},
                  "symmetric": session.symmetric},
        "uncertainty": {"draws": session.budget.n_draws,
                        "seed": session.budget.seed,
                        "workers": session.budget.workers,
                        "terms": [t for t, flag in _TERM_FLAGS.items()
                                  if getattr(session.budget, flag)]},
        "rotation_curve": {f.name: getattr(session.rotation, f.name)
                           for f in fields(RotationSettings)},
        "bar": {"length_arcsec": ("estimate" if bar.length_arcsec is None
                                  else bar.length_arcsec),
                "length_err_arcsec": bar.length_err_arcsec,
                "on_sky": bar.on_sky,
                "pa_deg": "estimate" if bar.pa_deg is None else bar.pa_deg},
        "radial": _radial_dict(session.radial),
        "stellar": _stellar_dict(session.absorption),
        "output": {f.name: (list(getattr(session.output, f.name))
                            if isinstance(getattr(session.output, f.name), tuple)
                            else getattr(session.output, f.name))
                   for f in fields(OutputSettings)},
    }
    if session.input.sha256:
        doc["input"]["sha256"] = dict(session.input.sha256)
    if session.slits is not None:
        doc["slits"]["slit"] = [
            {f.name: getattr(s, f.name) for f in fields(Slit)}
            for s in session.slits]
    for section in doc.values():
        for key in [k for k, val in section.items() if val is None]:
            del section[key]
    return doc


def _radial_dict(settings: RadialSettings | None) -> dict[str, Any]:
    enabled = settings is not None
    settings = settings or RadialSettings()
    return {"enabled": enabled, "n_annuli": settings.n_annuli or 0,
            "edges_arcsec": list(settings.edges_arcsec or ()),
            "regularisation": settings.regularisation, "lam": settings.lam,
            "fit_vsys_offset": settings.fit_vsys_offset,
            "n_mc": settings.n_mc, "oversample": settings.oversample}


def _stellar_dict(absorption: AbsorptionSettings) -> dict[str, Any]:
    st = absorption.stellar
    doc: dict[str, Any] = {}
    for spec in SCHEMA["stellar"]:
        if spec.name == "geometry_draws":
            doc[spec.name] = absorption.geometry_draws
            continue
        value = getattr(st, spec.name)
        if spec.kind == "floats":
            value = list(value or ())
        elif spec.kind == "pairs":
            value = [list(p) for p in value]
        elif spec.kind == "floats?" and value is not None:
            value = list(value)
        doc[spec.name] = value
    return doc


def session_to_toml(session: Session, *, header: bool = True,
                    comments: bool = True) -> str:
    """TOML text of a session (``header`` adds the schema table)."""
    from . import __version__

    doc = session_to_dict(session)
    lines: list[str] = []
    if header:
        lines += ["# Gyrometer session: every setting of one measurement.",
                  "# Re-run with:  gyrometer measure THIS_FILE",
                  f"[{SESSION_SCHEMA}]",
                  f"schema_version = {SESSION_SCHEMA_VERSION}",
                  f"gyrometer = {_toml_value(__version__)}", ""]
    for section, specs in SCHEMA.items():
        values = doc[section]
        lines.append(f"[{section}]")
        docs = {s.name: s.doc for s in specs}
        for key, value in values.items():
            if isinstance(value, (dict,)) or key == "slit":
                continue
            comment = f"  # {docs[key]}" if comments and key in docs else ""
            lines.append(f"{key} = {_toml_value(value)}{comment}")
        if section == "input" and "sha256" in values:
            lines.append("")
            lines.append("[input.sha256]  # checksums of the files as read")
            for role, digest in values["sha256"].items():
                lines.append(f"{role} = {_toml_value(digest)}")
        if section == "slits" and "slit" in values:
            for slit in values["slit"]:
                lines.append("")
                lines.append("[[slits.slit]]")
                for key, value in slit.items():
                    lines.append(f"{key} = {_toml_value(value)}")
        lines.append("")
    return "\n".join(lines)


def save_session(session: Session, path: str | os.PathLike,
                 overwrite: bool = False) -> Path:
    """Write the session file atomically (never over a file without
    ``overwrite``)."""
    return write_text_atomic(path, session_to_toml(session), overwrite)


# -- reading and migration ------------------------------------------------------
def migrate(doc: dict, source: str = "<session>") -> dict:
    """Bring a parsed session file to :data:`SESSION_SCHEMA_VERSION`.

    Version 0 (pre-release draft): ``[budget]`` with ``n_draws``/``seed``
    becomes ``[uncertainty]`` with ``draws``/``seed``; geometry ``pa`` and
    ``inc`` become ``pa_deg`` and ``inc_deg``. Newer versions raise
    :class:`SessionError`.
    """
    head = doc.get(SESSION_SCHEMA)
    if not isinstance(head, dict) or "schema_version" not in head:
        raise SessionError(f"not a session file (no [{SESSION_SCHEMA}] table "
                           "with schema_version)", path=source,
                           hint="a recipe is run with 'gyrometer measure', "
                                "which accepts both")
    version = head["schema_version"]
    if isinstance(version, bool) or not isinstance(version, int):
        raise SessionError("schema_version must be an integer", path=source,
                           keyword=f"{SESSION_SCHEMA}.schema_version",
                           value=version)
    if version > SESSION_SCHEMA_VERSION:
        raise SessionError(
            f"session schema version {version} is newer than this Gyrometer "
            f"understands (version {SESSION_SCHEMA_VERSION})", path=source,
            keyword=f"{SESSION_SCHEMA}.schema_version", value=version,
            hint="upgrade Gyrometer to read it")
    if version < 0:
        raise SessionError("unknown session schema version", path=source,
                           keyword=f"{SESSION_SCHEMA}.schema_version",
                           value=version)
    doc = {k: (dict(v) if isinstance(v, dict) else v) for k, v in doc.items()}
    if version == 0:
        old = doc.pop("budget", {})
        new = doc.setdefault("uncertainty", {})
        if "n_draws" in old:
            new["draws"] = old.pop("n_draws")
        new.update(old)
        geo = doc.get("geometry", {})
        for a, b in (("pa", "pa_deg"), ("inc", "inc_deg")):
            if a in geo:
                geo[b] = geo.pop(a)
        doc[SESSION_SCHEMA] = {**head, "schema_version": 1}
    return doc


def _session_from_file_doc(doc: dict, base_dir: Path, source: str) -> Session:
    doc = migrate(doc, source)
    head = doc[SESSION_SCHEMA]
    for key in head:
        if key not in ("schema_version", "gyrometer"):
            raise SessionError(f"unknown key; {_suggest(key, ['schema_version', 'gyrometer'])}",
                               path=source, keyword=f"{SESSION_SCHEMA}.{key}")
    return session_from_dict(doc, base_dir=base_dir, source=source,
                             check_files=False, error=SessionError)


def load_session(path: str | os.PathLike) -> Session:
    """Read a session file (TOML), migrating version 0.

    Raises
    ------
    SessionError
        Not a session file, invalid, or of a newer schema version.
    """
    p = Path(path)
    doc = read_toml(p, SessionError)
    return _session_from_file_doc(doc, p.parent, str(p))
