"""Build the corpus of bad inputs that Gyrometer must refuse politely.

Every case is made here from scratch (nothing is downloaded): small FITS
cubes and maps (16 x 16 pixels, 12 channels) with one fault each, recipes,
session files, region files and rotation-curve tables. For each case the
corpus records

* the file(s) written,
* the project exception (a subclass of
  :class:`gyrometer.core.errors.GyrometerError`) the Python API must raise,
* a fragment of the message the user must see (checked case-insensitively),
* a callable that feeds the file(s) to the Python API, and
* the ``gyrometer`` command-line arguments that meet the same fault
  (they must exit with ``exit_code``, print the fragment and no traceback).

The desktop-app tests reuse the same corpus (load this module by its path
with :mod:`importlib`, or use the ``corpus`` fixture of
``tests/robustness/conftest.py``).

Run as a script to write the corpus into a folder and list it::

    python tests/robustness/make_corpus.py /tmp/gyrometer-corpus
"""

from __future__ import annotations

import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
from astropy.io import fits
from astropy.wcs import WCS

from gyrometer.core import errors as E

__all__ = ["CorpusCase", "TOLERATED", "build_corpus", "build_tolerated",
           "good_mapset", "good_cube", "good_recipe", "recipe_text", "main"]

# Small sizes keep the whole corpus under a second to build.
NY = NX = 16
NC = 12
PIX_DEG = 1.0 / 3600.0          # 1 arcsec pixels
RA0, DEC0 = 150.0, 2.0          # invented field centre (no real object)
HI_REST_HZ = 1.420405752e9      # HI 21-cm rest frequency (NIST; common practice)


@dataclass(frozen=True)
class CorpusCase:
    """One bad input and what Gyrometer must say about it.

    Attributes
    ----------
    name : str
        Short identifier, used as the pytest id.
    kind : str
        What the user opened: ``"cube"``, ``"maps"``, ``"recipe"``,
        ``"session"``, ``"regions"``, ``"rotation_curve"``, ``"geometry"``,
        ``"slits"`` or ``"output"``.
    files : tuple of Path
        The file(s) of the case (the first is the one the user opened).
    error : type
        The :class:`~gyrometer.core.errors.GyrometerError` subclass the
        Python API raises.
    message : str
        Fragment of the message (case-insensitive) the user must see, from
        the API and from the command line.
    load : callable
        Feeds the case to the Python API; must raise ``error``.
    cli : tuple of str
        ``gyrometer`` arguments meeting the same fault.
    exit_code : int
        Expected exit status of the command line (1 = bad input, 4 =
        output refused).
    cli_message : str
        Fragment expected from the command line when it differs from
        ``message`` (e.g. a recipe names the key instead).
    keep : tuple of (Path, bytes)
        Files that must be unchanged afterwards (nothing the user made is
        lost).
    """

    name: str
    kind: str
    files: tuple[Path, ...]
    error: type
    message: str
    load: Callable[[], Any]
    cli: tuple[str, ...]
    exit_code: int = 1
    cli_message: str = ""
    keep: tuple[tuple[Path, bytes], ...] = field(default_factory=tuple)

    @property
    def expected_cli_message(self) -> str:
        return self.cli_message or self.message


# --------------------------------------------------------------------------
# building blocks
# --------------------------------------------------------------------------

def _celestial(header: fits.Header, *, crval=(RA0, DEC0), pc=None) -> None:
    header["CTYPE1"] = "RA---TAN"
    header["CTYPE2"] = "DEC--TAN"
    header["CUNIT1"] = "deg"
    header["CUNIT2"] = "deg"
    header["CRVAL1"] = crval[0]
    header["CRVAL2"] = crval[1]
    header["CRPIX1"] = (NX + 1) / 2.0
    header["CRPIX2"] = (NY + 1) / 2.0
    header["CDELT1"] = -PIX_DEG
    header["CDELT2"] = PIX_DEG
    if pc is not None:
        for i in range(2):
            for j in range(2):
                header[f"PC{i + 1}_{j + 1}"] = float(pc[i][j])
    header["RADESYS"] = "ICRS"


def _cube_header(ctype3: str = "FREQ", cunit3: str = "Hz",
                 crval3: float = HI_REST_HZ * (1 - 1500.0 / 299792.458),
                 cdelt3: float = -50e3, rest: float | None = HI_REST_HZ
                 ) -> fits.Header:
    header = fits.Header()
    _celestial(header)
    header["CTYPE3"] = ctype3
    if cunit3:
        header["CUNIT3"] = cunit3
    header["CRVAL3"] = crval3
    header["CDELT3"] = cdelt3
    header["CRPIX3"] = (NC + 1) / 2.0
    if rest is not None:
        header["RESTFRQ"] = rest
    header["SPECSYS"] = "BARYCENT"
    header["BUNIT"] = "Jy/beam"
    header["OBJECT"] = "LBDP-999"
    return header


def _line_cube(dtype=np.float32) -> np.ndarray:
    """A Gaussian line in every spaxel on a little noise (seeded)."""
    rng = np.random.default_rng(7)
    c = np.arange(NC)[:, None, None]
    yy, xx = np.mgrid[0:NY, 0:NX]
    centre = (NC - 1) / 2 + 2.0 * (xx - NX / 2) / NX
    line = np.exp(-0.5 * ((c - centre[None]) / 1.5) ** 2)
    disk = np.exp(-np.hypot(xx - NX / 2, yy - NY / 2) / 4.0)[None]
    return (line * disk + 0.01 * rng.standard_normal((NC, NY, NX))).astype(dtype)


def _disk_maps() -> tuple[np.ndarray, np.ndarray]:
    """Intensity and velocity (km/s) of a small rotating disk (PA 0, i 45)."""
    yy, xx = np.mgrid[0:NY, 0:NX].astype(float)
    east = -(xx - (NX - 1) / 2.0)   # CDELT1 < 0: east to the left
    north = yy - (NY - 1) / 2.0
    r = np.hypot(east, north / np.cos(np.radians(45.0)))
    intensity = np.exp(-r / 4.0) + 0.2 * np.exp(-((east / 5) ** 2 + (north / 1.5) ** 2))
    v = 1500.0 + 150.0 * np.tanh(r / 3.0) * np.divide(
        north, r, out=np.zeros_like(r), where=r > 0) * np.sin(np.radians(45.0))
    return intensity, v


def _map_header(bunit: str, extname: str, crval=(RA0, DEC0), pc=None) -> fits.Header:
    header = fits.Header()
    _celestial(header, crval=crval, pc=pc)
    header["BUNIT"] = bunit
    header["EXTNAME"] = extname
    return header


def _write_hdus(path: Path, hdus) -> Path:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # we write odd headers on purpose
        fits.HDUList(hdus).writeto(path, overwrite=True, output_verify="silentfix")
    return path


def _write_mef(path: Path, intensity, velocity, *, vel_bunit="km/s",
               vel_header=None, int_header=None) -> Path:
    primary = fits.PrimaryHDU()
    primary.header["OBJECT"] = "LBDP-999"
    primary.header["TRACER"] = "stars"
    ih = int_header if int_header is not None else _map_header("1e-20 erg/s/cm2", "INTENSITY")
    vh = vel_header if vel_header is not None else _map_header(vel_bunit, "VELOCITY")
    return _write_hdus(path, [primary,
                              fits.ImageHDU(np.asarray(intensity), ih),
                              fits.ImageHDU(np.asarray(velocity), vh)])


def good_cube(path: Path, **header_changes) -> Path:
    """A valid small HI cube (FREQ axis, RESTFRQ) with ``header_changes``."""
    header = _cube_header()
    for key, value in header_changes.items():
        if value is None:
            header.remove(key, ignore_missing=True)
        else:
            header[key] = value
    return _write_hdus(path, [fits.PrimaryHDU(_line_cube(), header)])


def good_mapset(path: Path) -> Path:
    """A valid small map set (Gyrometer's layout)."""
    intensity, velocity = _disk_maps()
    return _write_mef(path, intensity, velocity)


def _toml(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    raise TypeError(type(value))


def recipe_text(sections: dict[str, dict[str, Any]],
                slits: list[dict[str, float]] | None = None,
                header: dict[str, Any] | None = None) -> str:
    """TOML text of a recipe (or a session with ``header``)."""
    lines = []
    if header is not None:
        lines.append("[gyrometer-session]")
        lines += [f"{k} = {_toml(v)}" for k, v in header.items()]
        lines.append("")
    for name, values in sections.items():
        lines.append(f"[{name}]")
        lines += [f"{k} = {_toml(v)}" for k, v in values.items()]
        lines.append("")
    for slit in slits or ():
        lines.append("[[slits.slit]]")
        lines += [f"{k} = {_toml(v)}" for k, v in slit.items()]
        lines.append("")
    return "\n".join(lines)


def _geometry(**changes) -> dict[str, Any]:
    geo = {"mode": "given", "ra_deg": RA0, "dec_deg": DEC0, "pa_deg": 0.0,
           "inc_deg": 45.0, "vsys_kms": 1500.0, "distance_mpc": 20.0}
    geo.update(changes)
    return geo


def good_recipe_sections(maps_name: str = "maps.fits", **section_changes
                         ) -> dict[str, dict[str, Any]]:
    """Sections of a fast, valid recipe on ``maps_name`` (few draws, no
    figures), with ``section_changes`` merged per section."""
    sections: dict[str, dict[str, Any]] = {
        "galaxy": {"name": "LBDP-999", "tracer": "stars"},
        "input": {"kind": "maps", "maps": maps_name},
        "geometry": _geometry(),
        "slits": {"count": 3, "spacing_arcsec": 2.0, "width_arcsec": 2.0,
                  "half_length_arcsec": 5.0},
        "uncertainty": {"draws": 10, "terms": ["noise"]},
        "rotation_curve": {"source": "none"},
        "bar": {"length_arcsec": 0.0},
        "output": {"folder": "out", "figures": [], "tables": ["ecsv"],
                   "regions": "none", "session": False},
    }
    for name, values in section_changes.items():
        sections.setdefault(name, {}).update(values)
    return sections


def good_recipe(folder: Path, name: str = "good.toml", **section_changes) -> Path:
    """A valid recipe with its map set in ``folder``."""
    maps = folder / "maps.fits"
    if not maps.exists():
        good_mapset(maps)
    path = folder / name
    path.write_text(recipe_text(good_recipe_sections(**section_changes)),
                    encoding="utf-8")
    return path


def _truncate(path: Path, keep: int) -> Path:
    data = path.read_bytes()
    path.write_bytes(data[:keep])
    return path


def _header_card_replace(path: Path, key: str, card_text: str) -> Path:
    """Replace the first header card starting with ``key`` by raw text."""
    data = bytearray(path.read_bytes())
    for start in range(0, 2880 * 4, 80):
        if data[start:start + 8].decode("ascii", "replace").rstrip() == key:
            raw = card_text.encode("latin-1").ljust(80)[:80]
            data[start:start + 80] = raw
            path.write_bytes(bytes(data))
            return path
    raise KeyError(key)


# --------------------------------------------------------------------------
# the corpus
# --------------------------------------------------------------------------

def _api_cube(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.fitsio import load_cube
        return load_cube(path)
    return run


def _api_moments(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.fitsio import load_cube
        from gyrometer.core.moments import MomentSettings, compute_moments
        return compute_moments(load_cube(path), MomentSettings(
            vsys_kms=1500.0, window_halfwidth_kms=25.0))
    return run


def _api_open(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.fitsio import open_data
        return open_data(path)
    return run


def _api_recipe(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.recipe import load_recipe
        return load_recipe(path)
    return run


def _api_session(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.session import load_session
        return load_session(path)
    return run


def _api_pipeline(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.pipeline import run_session
        from gyrometer.core.recipe import load_recipe
        return run_session(load_recipe(path))
    return run


def _api_regions(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.geometry import DiskGeometry
        from gyrometer.core.regionfiles import read_slit_regions
        return read_slit_regions(path, DiskGeometry(RA0, DEC0, 0.0, 45.0))
    return run


def _api_rotation(path: Path) -> Callable[[], Any]:
    def run():
        from gyrometer.core.rotation import load_rotation_curve
        return load_rotation_curve(path)
    return run


def _cube_cases(folder: Path) -> list[CorpusCase]:
    cases: list[CorpusCase] = []

    def add(name, path, error, message, load=None, cli=None, **kw):
        load = load or _api_cube(path)
        cli = cli or ("moments", str(path), "--vsys", "1500", "--window", "25",
                      "-o", str(folder / f"{name}_maps.fits"))
        cases.append(CorpusCase(name, "cube", (path,), error, message, load,
                                tuple(cli), **kw))

    p = folder / "not_fits.fits"
    p.write_text("RA DEC FLUX\n150.0 2.0 1.0\n", encoding="utf-8")
    add("not_fits", p, E.InputFileError, "not a FITS file")

    p = folder / "pickle_named_fits.fits"
    p.write_bytes(b"\x80\x04\x95\x10\x00\x00\x00\x00\x00\x00\x00}\x94.")
    add("pickle_bytes_as_fits", p, E.InputFileError, "not a FITS file")

    p = _truncate(good_cube(folder / "truncated_data.fits"), 2880 + 1000)
    add("truncated_data", p, E.InputFileError, "truncated")

    p = _truncate(good_cube(folder / "truncated_header.fits"), 1000)
    add("truncated_header", p, E.InputFileError, "header of HDU 0 is cut short")

    p = folder / "map_2d.fits"
    h = _map_header("Jy/beam", "")
    del h["EXTNAME"]
    _write_hdus(p, [fits.PrimaryHDU(_disk_maps()[0], h)])
    add("2d_not_cube", p, E.DataContentError, "no 3D cube")

    p = good_cube(folder / "no_spectral_axis.fits", CTYPE3="", CUNIT3=None)
    add("no_spectral_axis", p, E.SpectralAxisError, "no spectral axis")

    p = good_cube(folder / "no_celestial.fits", CTYPE1="", CTYPE2="")
    add("no_celestial_wcs", p, E.HeaderError, "no celestial WCS")

    p = good_cube(folder / "unknown_ctype.fits", CTYPE3="CHANNEL", CUNIT3=None)
    add("unknown_spectral_ctype", p, E.SpectralAxisError,
        "unknown spectral axis type")

    p = good_cube(folder / "no_rest.fits", RESTFRQ=None)
    add("velocity_without_rest_value", p, E.SpectralAxisError, "no rest value",
        load=_api_moments(p))

    p = folder / "empty_primary.fits"
    _write_hdus(p, [fits.PrimaryHDU()])
    add("empty_data", p, E.DataContentError, "no 3D cube")

    p = folder / "all_nan.fits"
    _write_hdus(p, [fits.PrimaryHDU(np.full((NC, NY, NX), np.nan, np.float32),
                                    _cube_header())])
    add("all_nan_cube", p, E.DataContentError, "all NaN")

    p = folder / "all_inf.fits"
    _write_hdus(p, [fits.PrimaryHDU(np.full((NC, NY, NX), np.inf, np.float32),
                                    _cube_header())])
    add("all_inf_cube", p, E.DataContentError, "all NaN or infinite")

    data = _line_cube()
    data[3:9] = np.nan                         # every channel of the line
    p = folder / "nan_in_line_window.fits"
    _write_hdus(p, [fits.PrimaryHDU(data, _cube_header())])
    add("nan_only_in_line_window", p, E.DataContentError,
        "no valid data in the velocity window", load=_api_moments(p))

    p = good_cube(folder / "zero_width_channels.fits", CDELT3=0.0)
    add("zero_width_channels", p, E.SpectralAxisError, "zero-width channels")

    p = folder / "bitpix_24.fits"
    good_cube(p)
    _header_card_replace(p, "BITPIX", "BITPIX  =                   24")
    add("unusual_bitpix_24", p, E.InputFileError, "BITPIX = 24 is not a FITS data type")

    p = folder / "singular_pc.fits"
    h = _cube_header()
    for key, val in (("PC1_1", 1.0), ("PC1_2", 1.0), ("PC2_1", 1.0), ("PC2_2", 1.0)):
        h[key] = val
    _write_hdus(p, [fits.PrimaryHDU(_line_cube(), h)])
    add("singular_wcs_matrix", p, E.HeaderError, "singular")

    p = good_cube(folder / "naxis_too_large.fits")
    _header_card_replace(p, "NAXIS1", "NAXIS1  =              1000000")
    add("naxis_larger_than_file", p, E.InputFileError, "truncated")

    p = good_cube(folder / "non_ascii_ctype.fits")
    _header_card_replace(p, "CTYPE3", "CTYPE3  = 'FR\xc9Q    '")
    add("non_ascii_spectral_ctype", p, E.SpectralAxisError,
        "unknown spectral axis type")

    p = folder / "one_pixel_cube.fits"
    h = _cube_header()
    _write_hdus(p, [fits.PrimaryHDU(_line_cube()[:, :1, :1], h)])
    add("one_pixel_cube", p, E.DataContentError, "no 3D cube")
    return cases


def _map_cases(folder: Path) -> list[CorpusCase]:
    cases: list[CorpusCase] = []
    intensity, velocity = _disk_maps()

    def add(name, path, error, message, load=None, cli=None, files=None, **kw):
        load = load or _api_open(path)
        cli = cli or ("starter", str(path), "-o", str(folder / f"{name}.toml"))
        cases.append(CorpusCase(name, "maps", tuple(files or (path,)), error,
                                message, load, tuple(cli), **kw))

    p = folder / "maps_empty.fits"
    _write_hdus(p, [fits.PrimaryHDU()])
    add("maps_empty_file", p, E.DataContentError, "no map extension recognised")

    p = folder / "maps_all_nan.fits"
    _write_mef(p, np.full_like(intensity, np.nan), velocity)
    add("maps_all_nan", p, E.DataContentError, "all NaN")

    p = folder / "maps_shapes.fits"
    _write_mef(p, intensity[:, :-3], velocity)
    add("maps_shapes_disagree", p, E.MapMismatchError, "differ in shape or WCS")

    p = folder / "maps_wcs.fits"
    _write_mef(p, intensity, velocity,
               int_header=_map_header("1", "INTENSITY", crval=(RA0 + 0.01, DEC0)))
    add("maps_wcs_disagree", p, E.MapMismatchError, "differ in shape or WCS")

    p = folder / "maps_vel_unit.fits"
    _write_mef(p, intensity, velocity, vel_bunit="Jy/beam")
    add("velocity_unit_not_velocity", p, E.UnitError, "not a velocity")

    p = folder / "maps_one_pixel.fits"
    _write_mef(p, intensity[:1, :1], velocity[:1, :1])
    add("maps_one_pixel", p, E.DataContentError, "a 2D map is needed")

    p = folder / "maps_singular.fits"
    sing = [[1.0, 2.0], [0.5, 1.0]]
    _write_mef(p, intensity, velocity,
               int_header=_map_header("1", "INTENSITY", pc=sing),
               vel_header=_map_header("km/s", "VELOCITY", pc=sing))
    add("maps_singular_wcs_matrix", p, E.HeaderError, "singular")

    # one file per map, disagreeing WCS, met through a recipe
    fi = folder / "sep_intensity.fits"
    fv = folder / "sep_velocity.fits"
    h = _map_header("1", "")
    del h["EXTNAME"]
    _write_hdus(fi, [fits.PrimaryHDU(intensity, h)])
    h = _map_header("km/s", "", crval=(RA0, DEC0 + 0.02))
    del h["EXTNAME"]
    _write_hdus(fv, [fits.PrimaryHDU(velocity, h)])
    recipe = folder / "separate_maps.toml"
    recipe.write_text(recipe_text(good_recipe_sections(
        input={"kind": "maps", "maps": "", "intensity": fi.name,
               "velocity": fv.name})), encoding="utf-8")

    def load_separate():
        from gyrometer.core.fitsio import load_mapset
        return load_mapset(intensity=fi, velocity=fv)
    add("separate_maps_wcs_disagree", fi, E.MapMismatchError,
        "differ in shape or WCS", load=load_separate,
        cli=("measure", str(recipe)), files=(fi, fv, recipe))

    # a very thin map (2 pixels high): loads, but no slits fit on it
    p = folder / "maps_thin.fits"
    thin_i = intensity[7:9, :]
    thin_v = velocity[7:9, :]
    _write_mef(p, thin_i, thin_v)
    recipe = folder / "thin_map.toml"
    recipe.write_text(recipe_text(good_recipe_sections(
        maps_name=p.name, slits={"count": 0, "spacing_arcsec": 0.0,
                                 "width_arcsec": 0.0, "half_length_arcsec": 0.0},
        geometry={"pa_deg": 90.0})), encoding="utf-8")
    add("very_thin_map", p, E.GyrometerError, "slit", load=_api_pipeline(recipe),
        cli=("measure", str(recipe), "--no-figures"), files=(p, recipe))
    return cases


def _recipe_cases(folder: Path) -> list[CorpusCase]:
    cases: list[CorpusCase] = []
    good_mapset(folder / "maps.fits")

    def add(name, path, error, message, load=None, cli=None, files=None, **kw):
        load = load or _api_recipe(path)
        cli = cli or ("check", str(path))
        cases.append(CorpusCase(name, "recipe", tuple(files or (path,)), error,
                                message, load, tuple(cli), **kw))

    def recipe(name, **changes) -> Path:
        return good_recipe(folder, f"{name}.toml", **changes)

    add("recipe_wrong_type", recipe("wrong_type", geometry={"pa_deg": "north"}),
        E.RecipeError, "geometry.pa_deg: must be a number")
    add("recipe_wrong_type_list", recipe("wrong_list", output={"tables": "ecsv"}),
        E.RecipeError, "output.tables: must be a list of strings")
    add("recipe_unknown_key", recipe("unknown_key", geometry={"pa_degree": 10.0}),
        E.RecipeError, "did you mean 'pa_deg'")
    p = folder / "unknown_section.toml"
    p.write_text(recipe_text({**good_recipe_sections(), "geometri": {"x": 1}}),
                 encoding="utf-8")
    add("recipe_unknown_section", p, E.RecipeError, "unknown section")
    add("recipe_missing_file", recipe("missing_file", input={"maps": "gone.fits"}),
        E.RecipeError, "file not found")
    p = folder / "not_toml.toml"
    p.write_text("[geometry\npa_deg = = 3\n", encoding="utf-8")
    add("recipe_not_toml", p, E.RecipeError, "not valid TOML")
    p = folder / "latin1.toml"
    p.write_bytes("[galaxy]\nname = \"Galaxi\xe9\"\n".encode("latin-1"))
    add("recipe_not_utf8", p, E.RecipeError, "cannot read the file")
    add("inclination_zero", recipe("inc0", geometry={"inc_deg": 0.0}),
        E.RecipeError, "inclination must be strictly between 0 and 90")
    add("inclination_ninety", recipe("inc90", geometry={"inc_deg": 90.0}),
        E.RecipeError, "inclination must be strictly between 0 and 90")
    add("distance_zero", recipe("dist0", geometry={"distance_mpc": 0.0}),
        E.RecipeError, "distance must be positive")
    add("distance_negative", recipe("distneg", geometry={"distance_mpc": -3.0}),
        E.RecipeError, "distance must be positive")

    def geometry_case(**changes):
        def run():
            from gyrometer.core.geometry import DiskGeometry
            values = dict(ra_deg=RA0, dec_deg=DEC0, pa_deg=0.0, inc_deg=45.0,
                          distance_mpc=20.0)
            values.update(changes)
            return DiskGeometry(**values)
        return run

    for name, changes, message in (
            ("geometry_inclination_zero", {"inc_deg": 0.0},
             "inclination must be strictly between 0 and 90"),
            ("geometry_inclination_ninety", {"inc_deg": 90.0},
             "inclination must be strictly between 0 and 90"),
            ("geometry_distance_zero", {"distance_mpc": 0.0},
             "distance must be positive"),
            ("geometry_distance_negative", {"distance_mpc": -1.0},
             "distance must be positive")):
        key = "inc_deg" if "inc_deg" in changes else "distance_mpc"
        p = recipe(name, geometry=changes)
        cases.append(CorpusCase(name, "geometry", (p,), E.GeometryError, message,
                                geometry_case(**changes), ("check", str(p)),
                                cli_message=f"geometry.{key}: {message}"))

    # slits entirely off the data
    p = folder / "slits_off.toml"
    p.write_text(recipe_text(good_recipe_sections(), slits=[
        {"offset_arcsec": 500.0 + 3 * k, "width_arcsec": 2.0,
         "half_length_arcsec": 5.0} for k in range(3)]), encoding="utf-8")

    def slits_off():
        from gyrometer.core.fitsio import load_mapset
        from gyrometer.core.geometry import DiskGeometry
        from gyrometer.core.slits import SlitSet
        from gyrometer.core.tw import measure
        maps = load_mapset(folder / "maps.fits")
        return measure(maps, DiskGeometry(RA0, DEC0, 0.0, 45.0, 1500.0),
                       SlitSet.generate(3, 3.0, 2.0, 5.0, first_offset_arcsec=500.0),
                       warn=False)
    cases.append(CorpusCase("slits_off_the_data", "slits", (p,), E.FitError,
                            "fewer than two slits have valid integrals",
                            slits_off, ("measure", str(p), "--no-figures")))

    # rotation-curve tables
    for name, text, message in (
            ("rotation_curve_two_points",
             "r_arcsec v_kms v_err_kms\n1.0 50.0 5.0\n2.0 90.0 5.0\n",
             "at least 3 points"),
            ("rotation_curve_repeated_radius",
             "r_arcsec v_kms v_err_kms\n1.0 50.0 5.0\n2.0 90.0 5.0\n"
             "2.0 95.0 5.0\n3.0 120.0 5.0\n",
             "strictly increasing"),
            # out of order: refused (row named), never sorted silently
            ("rotation_curve_decreasing_radius",
             "r_arcsec v_kms v_err_kms\n1.0 50.0 5.0\n3.0 120.0 5.0\n"
             "2.0 90.0 5.0\n4.0 130.0 5.0\n",
             "row 3 (2) is smaller than row 2 (3)"),
            ("rotation_curve_no_header", "1.0 50.0 5.0\n2.0 90.0 5.0\n",
             "column")):
        table = folder / f"{name}.txt"
        table.write_text(text, encoding="utf-8")
        p = recipe(name, rotation_curve={"source": "file", "file": table.name})
        error = E.RotationCurveError if "column" not in message else E.GyrometerError
        cases.append(CorpusCase(name, "rotation_curve", (table, p), error,
                                message, _api_rotation(table),
                                ("measure", str(p), "--no-figures")))
    return cases


def _session_cases(folder: Path) -> list[CorpusCase]:
    cases: list[CorpusCase] = []
    good_mapset(folder / "maps.fits")

    def add(name, header, message, error=E.SessionError, **changes):
        p = folder / f"{name}.session.toml"
        sections = good_recipe_sections(
            maps_name=str((folder / "maps.fits").resolve()), **changes)
        p.write_text(recipe_text(sections, header=header), encoding="utf-8")
        cases.append(CorpusCase(name, "session", (p,), error, message,
                                _api_session(p), ("check", str(p))))

    add("session_newer_version", {"schema_version": 99}, "newer")
    add("session_version_not_int", {"schema_version": "one"},
        "schema_version must be an integer")
    add("session_unknown_header_key", {"schema_version": 1, "author": "x"},
        "unknown key")
    add("session_unknown_key", {"schema_version": 1}, "unknown key",
        slits={"offsets": [1.0]})
    add("session_wrong_type", {"schema_version": 1}, "must be an integer",
        uncertainty={"draws": 10.5})
    p = folder / "pickled.session.toml"
    import pickle  # only to *write* a hostile file; never to read one
    p.write_bytes(pickle.dumps({"gyrometer-session": {"schema_version": 1}}))
    cases.append(CorpusCase("session_pickle_bytes", "session", (p,), E.SessionError,
                            "cannot read the file", _api_session(p),
                            ("check", str(p)), cli_message="cannot read the file"))
    return cases


def _region_cases(folder: Path) -> list[CorpusCase]:
    cases: list[CorpusCase] = []
    into = good_recipe(folder, "regions_into.toml")

    def add(name, text, error, message):
        p = folder / f"{name}.reg"
        p.write_text(text, encoding="utf-8")
        out = folder / f"{name}.session.toml"
        cases.append(CorpusCase(name, "regions", (p,), error, message,
                                _api_regions(p),
                                ("regions", "import", str(p), "--into",
                                 str(into), "-o", str(out))))

    add("regions_garbage", "this is not a region file {{{\n",
        E.GyrometerError, "region")
    add("regions_circle", "# Region file format: DS9\nicrs\n"
        f"circle({RA0},{DEC0},5\")\n", E.SlitError, "only sky polygons")
    add("regions_triangle", "# Region file format: DS9\nicrs\n"
        f"polygon({RA0},{DEC0},{RA0 + 0.001},{DEC0},{RA0},{DEC0 + 0.001})\n",
        E.SlitError, "a slit has 4")
    add("regions_empty", "# Region file format: DS9\nicrs\n", E.SlitError,
        "no regions")
    return cases


def _output_cases(folder: Path) -> list[CorpusCase]:
    mine = folder / "my_notes.toml"
    text = b"# my own recipe, hand-written: must never be overwritten\n"
    mine.write_bytes(text)
    cube = good_cube(folder / "good_cube.fits")

    def run():
        from gyrometer.core.safeio import write_text_atomic
        return write_text_atomic(mine, "replaced", False)
    return [CorpusCase("output_exists_without_force", "output", (mine,),
                       E.OutputError, "exists", run,
                       ("starter", str(cube), "-o", str(mine)), exit_code=4,
                       keep=((mine, text),))]


def build_corpus(folder: str | Path) -> list[CorpusCase]:
    """Write every bad input into ``folder`` and return the cases."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    cases = (_cube_cases(folder) + _map_cases(folder) + _recipe_cases(folder)
             + _session_cases(folder) + _region_cases(folder)
             + _output_cases(folder))
    names = [c.name for c in cases]
    assert len(names) == len(set(names)), "corpus case names must be unique"
    return cases


# --------------------------------------------------------------------------
# odd but valid inputs: these must load and give the right numbers
# --------------------------------------------------------------------------

#: Odd-but-valid files and what is checked about them.
TOLERATED = ("bitpix_8", "bitpix_16_scaled", "bitpix_32", "bitpix_64",
             "bitpix_minus_64", "decreasing_spectral_axis", "non_ascii_object")


def build_tolerated(folder: str | Path) -> dict[str, tuple[Path, np.ndarray]]:
    """Odd but valid cubes, with the data values they must load as.

    Unusual BITPIX values (8, 16 with BSCALE/BZERO, 32, 64, -64), a
    spectral axis whose velocity decreases with channel, and a header value
    with non-ASCII bytes (outside the FITS standard, but harmless in OBJECT).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    base = _line_cube(np.float64)
    out: dict[str, tuple[Path, np.ndarray]] = {}
    ints = np.round(base * 100).astype(np.int64) + 20
    for name, dtype in (("bitpix_8", np.uint8), ("bitpix_32", np.int32),
                        ("bitpix_64", np.int64)):
        p = folder / f"{name}.fits"
        _write_hdus(p, [fits.PrimaryHDU(ints.astype(dtype), _cube_header())])
        out[name] = (p, ints.astype(float))
    p = folder / "bitpix_16_scaled.fits"
    h = _cube_header()
    raw = np.round(base * 1000).astype(np.int16)
    hdu = fits.PrimaryHDU(raw, h)
    hdu.header["BSCALE"] = 0.001
    hdu.header["BZERO"] = 5.0
    _write_hdus(p, [hdu])
    out["bitpix_16_scaled"] = (p, raw.astype(float) * 0.001 + 5.0)
    p = folder / "bitpix_minus_64.fits"
    _write_hdus(p, [fits.PrimaryHDU(base, _cube_header())])
    out["bitpix_minus_64"] = (p, base)
    # frequency increasing with channel = velocity decreasing (the base
    # cube has CDELT3 < 0, velocity increasing); the data are flipped so
    # that each spaxel holds the same spectrum against velocity
    p = folder / "decreasing_spectral_axis.fits"
    flipped = base[::-1].astype(np.float32)
    _write_hdus(p, [fits.PrimaryHDU(flipped, _cube_header(cdelt3=+50e3))])
    out["decreasing_spectral_axis"] = (p, flipped)
    p = good_cube(folder / "non_ascii_object.fits")
    _header_card_replace(p, "OBJECT", "OBJECT  = 'Galaxi\xe9 \xfcber'")
    out["non_ascii_object"] = (p, _line_cube())
    return out


def main(argv: list[str] | None = None) -> int:
    """Write the corpus into a folder and list the cases."""
    argv = sys.argv[1:] if argv is None else argv
    if len(argv) != 1:
        print("usage: make_corpus.py FOLDER", file=sys.stderr)
        return 2
    folder = Path(argv[0])
    cases = build_corpus(folder)
    build_tolerated(folder / "tolerated")
    for case in cases:
        print(f"{case.name:36s} {case.error.__name__:18s} {case.message!r}  "
              f"[{', '.join(p.name for p in case.files)}]")
    print(f"{len(cases)} bad inputs written to {folder}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
