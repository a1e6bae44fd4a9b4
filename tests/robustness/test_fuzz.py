"""Fuzzing the readers: FITS cubes and maps, recipes, sessions, region files.

Each reader gets hypothesis-generated inputs (valid files with mutated
header cards, truncations and flipped bytes; TOML documents of random keys
and random types; region files of random shapes and numbers). Whatever the
input, the reader either returns its dataclass or raises a subclass of
:class:`~gyrometer.core.errors.GyrometerError`; any other exception is a
crash and fails the test. Inputs found to crash a reader are kept below
as regression tests (``test_regression_*``).

CI runs about 500 examples in all. The long run sets
``GYROMETER_FUZZ_EXAMPLES`` (the total over the readers), e.g.::

    GYROMETER_FUZZ_EXAMPLES=50000 python -m pytest tests/robustness/test_fuzz.py
"""

from __future__ import annotations

import itertools
import json
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gyrometer.core.errors import GyrometerError
from gyrometer.core.geometry import DiskGeometry

_TOTAL = int(os.environ.get("GYROMETER_FUZZ_EXAMPLES", "500"))
# shares of the total per reader (sum 1)
_SHARE = {"cube": 0.22, "maps": 0.18, "recipe": 0.22, "session": 0.16,
          "regions": 0.22}


def _fuzz_settings(reader: str):
    return settings(max_examples=max(10, int(_TOTAL * _SHARE[reader])),
                    deadline=None, derandomize=_TOTAL <= 500,
                    suppress_health_check=[HealthCheck.too_slow,
                                           HealthCheck.data_too_large])


_SCRATCH = tempfile.TemporaryDirectory(prefix="gyrometer-fuzz-")
_COUNTER = itertools.count()


def _fresh(suffix: str, content: bytes) -> Path:
    """A new file per example (a memory map of an earlier example's file
    must never see that file rewritten)."""
    path = Path(_SCRATCH.name) / f"f{next(_COUNTER)}{suffix}"
    path.write_bytes(content)
    return path


def _only_our_errors(call):
    """Run ``call``; return its value or the GyrometerError it raised.

    Warnings from astropy and regions about odd input are expected and
    are recorded, not turned into errors; any exception that is not a
    GyrometerError propagates and fails the test.
    """
    with warnings.catch_warnings(record=True):
        warnings.simplefilter("always")
        try:
            return call()
        except GyrometerError as exc:
            assert str(exc)  # a message for the user
            return exc


# -- FITS ----------------------------------------------------------------------
def _base_cube() -> bytes:
    h = fits.Header()
    for k, v in (("CTYPE1", "RA---TAN"), ("CTYPE2", "DEC--TAN"),
                 ("CTYPE3", "FREQ"), ("CUNIT3", "Hz"), ("CRVAL1", 150.0),
                 ("CRVAL2", 2.0), ("CRVAL3", 1.4134e9), ("CRPIX1", 3.0),
                 ("CRPIX2", 2.5), ("CRPIX3", 3.0), ("CDELT1", -2.8e-4),
                 ("CDELT2", 2.8e-4), ("CDELT3", -5e4), ("PC1_1", 1.0),
                 ("PC2_2", 1.0), ("RESTFRQ", 1.420405752e9), ("BUNIT", "Jy/beam"),
                 ("SPECSYS", "BARYCENT"), ("BMAJ", 5e-4), ("OBJECT", "LBDP-999")):
        h[k] = v
    data = np.arange(6 * 4 * 5, dtype=np.float32).reshape(6, 4, 5) / 10.0
    hdus = fits.HDUList([fits.PrimaryHDU(data, h),
                         fits.ImageHDU(np.ones_like(data), h, name="STAT")])
    path = Path(_SCRATCH.name) / "base_cube.fits"
    hdus.writeto(path, overwrite=True)
    return path.read_bytes()


def _base_maps() -> bytes:
    h = fits.Header()
    for k, v in (("CTYPE1", "RA---TAN"), ("CTYPE2", "DEC--TAN"), ("CRVAL1", 150.0),
                 ("CRVAL2", 2.0), ("CRPIX1", 3.0), ("CRPIX2", 2.5),
                 ("CDELT1", -2.8e-4), ("CDELT2", 2.8e-4)):
        h[k] = v
    img = np.arange(20, dtype=float).reshape(4, 5) + 1.0
    hdus = [fits.PrimaryHDU()]
    for name, unit in (("INTENSITY", "1"), ("VELOCITY", "km/s"),
                       ("VELOCITY_ERR", "km/s")):
        hh = h.copy()
        hh["BUNIT"] = unit
        hdus.append(fits.ImageHDU(img, hh, name=name))
    path = Path(_SCRATCH.name) / "base_maps.fits"
    fits.HDUList(hdus).writeto(path, overwrite=True)
    return path.read_bytes()


_BASE_CUBE = _base_cube()
_BASE_MAPS = _base_maps()
_KEYS = ["SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "NAXIS3", "EXTEND",
         "CTYPE1", "CTYPE2", "CTYPE3", "CUNIT1", "CUNIT3", "CRVAL1", "CRVAL2",
         "CRVAL3", "CRPIX1", "CRPIX3", "CDELT1", "CDELT2", "CDELT3", "PC1_1",
         "PC1_2", "PC2_2", "RESTFRQ", "BUNIT", "BSCALE", "BZERO", "BLANK",
         "BMAJ", "SPECSYS", "XTENSION", "EXTNAME", "PCOUNT", "GCOUNT", "END"]
_VALUES = st.one_of(
    st.integers(-2**63, 2**63 - 1).map(str),
    st.sampled_from(["0", "-1", "8", "16", "-32", "-64", "64", "24", "3", "1",
                     "T", "F", "1E300", "-1E-300", "NAN", "'FREQ'", "'VRAD'",
                     "'RA---TAN'", "'GLON-CAR'", "'AWAV-LOG'", "'VELO-LSR'",
                     "'STOKES'", "''", "'km/s'", "'m s-1 Jy'", "'VELOCITY'",
                     "'INTENSITY'", "'IMAGE'"]),
    st.floats(allow_nan=False, allow_infinity=False).map(lambda x: f"{x:.6E}"),
    st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=255),
            max_size=20).map(lambda s: "'" + s.replace("'", "''") + "'"),
)


def _set_card(data: bytearray, key: str, value: str, occurrence: int,
              raw: str | None = None) -> None:
    """Give the ``occurrence``-th card named ``key`` the value text
    ``value`` (or replace the whole card by ``raw``)."""
    seen = 0
    for start in range(0, len(data) - 79, 80):
        name = bytes(data[start:start + 8]).decode("latin-1").rstrip()
        if name == key:
            if seen == occurrence:
                card = f"{key:<8}= {value:>20}" if key != "END" else value
                card = card if raw is None else raw
                data[start:start + 80] = card.encode("latin-1", "replace").ljust(80)[:80]
                return
            seen += 1


_OPS = st.one_of(
    st.tuples(st.just("card"), st.sampled_from(_KEYS), _VALUES, st.integers(0, 2)),
    st.tuples(st.just("truncate"), st.integers(0, 12000)),
    st.tuples(st.just("bytes"), st.integers(0, 12000),
              st.binary(min_size=1, max_size=8)),
)


def _mutate(base: bytes, ops) -> bytes:
    data = bytearray(base)
    for op in ops:
        if op[0] == "card":
            _set_card(data, op[1], op[2], op[3])
        elif op[0] == "truncate":
            del data[op[1]:]
        else:
            pos = min(op[1], len(data))
            data[pos:pos + len(op[2])] = op[2]
    return bytes(data)


@_fuzz_settings("cube")
@given(ops=st.lists(_OPS, min_size=1, max_size=4))
def test_fuzz_cube_reader(ops):
    from gyrometer.core.fitsio import load_cube, open_data
    from gyrometer.core.spectral import channel_velocities

    path = _fresh(".fits", _mutate(_BASE_CUBE, ops))
    cube = _only_our_errors(lambda: load_cube(path))
    if isinstance(cube, GyrometerError):
        _only_our_errors(lambda: open_data(path))
        return
    assert cube.data.ndim == 3
    np.asarray(cube.data[-1])                       # the data can be read
    _only_our_errors(lambda: channel_velocities(cube.spectral))


@_fuzz_settings("maps")
@given(ops=st.lists(_OPS, min_size=1, max_size=4))
def test_fuzz_mapset_reader(ops):
    from gyrometer.core.coords import pixel_scale_arcsec
    from gyrometer.core.fitsio import load_mapset

    path = _fresh(".fits", _mutate(_BASE_MAPS, ops))
    maps = _only_our_errors(lambda: load_mapset(path))
    if isinstance(maps, GyrometerError):
        return
    assert maps.intensity.shape == maps.velocity_kms.shape
    _only_our_errors(lambda: pixel_scale_arcsec(maps.wcs))


# -- recipes and sessions -----------------------------------------------------
def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return {"nan": "nan", "inf": "inf", "-inf": "-inf"}.get(repr(value),
                                                               repr(value))
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{json.dumps(k)} = {_toml_value(v)}"
                               for k, v in value.items()) + "}"
    raise TypeError(type(value))


def _schema():
    from gyrometer.core.session import SCHEMA
    return SCHEMA


_SCALARS = st.one_of(
    st.booleans(), st.integers(-10**6, 10**6), st.integers(-2**63, 2**63 - 1),
    st.floats(), st.text(max_size=12),
    st.sampled_from(["estimate", "given", "maps", "cube", "file", "none",
                     "derived", "stars", "HI", "ds9", "ecsv", "Halpha", "",
                     "smooth", "best", "noise", "aastex", "arcsec"]))
_VALUES_TOML = st.one_of(_SCALARS, st.lists(_SCALARS, max_size=3),
                         st.dictionaries(st.text(min_size=1, max_size=6),
                                         _SCALARS, max_size=2))


@st.composite
def _documents(draw, session: bool):
    schema = _schema()
    sections = draw(st.lists(st.sampled_from(list(schema) + ["extra", "budget"]),
                             unique=True, max_size=len(schema) + 2))
    lines = []
    if session:
        header = {"schema_version": draw(st.one_of(st.integers(-2, 3), _SCALARS))}
        if draw(st.booleans()):
            header[draw(st.sampled_from(["gyrometer", "author", "x"]))] = \
                draw(_SCALARS)
        lines.append("[gyrometer-session]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in header.items()]
    for section in sections:
        known = [s.name for s in schema.get(section, ())]
        keys = draw(st.lists(st.one_of(st.sampled_from(known or ["k"]),
                                       st.from_regex(r"[a-z_]{1,10}", fullmatch=True)),
                             unique=True, max_size=6))
        lines.append(f"[{section}]")
        for key in keys:
            lines.append(f"{key} = {_toml_value(draw(_VALUES_TOML))}")
    for _ in range(draw(st.integers(0, 2))):
        lines.append("[[slits.slit]]" if "slits" in sections else "[[slit]]")
        for key in draw(st.lists(st.sampled_from(
                ["offset_arcsec", "width_arcsec", "half_length_arcsec",
                 "x_center_arcsec", "angle"]), unique=True, max_size=5)):
            lines.append(f"{key} = {_toml_value(draw(_SCALARS))}")
    text = "\n".join(lines) + "\n"
    if draw(st.booleans()):                 # raw damage on top
        raw = bytearray(text.encode("utf-8"))
        pos = draw(st.integers(0, len(raw)))
        raw[pos:pos] = draw(st.binary(max_size=4))
        return bytes(raw)
    return text.encode("utf-8")


@_fuzz_settings("recipe")
@given(doc=_documents(session=False), check_files=st.booleans())
def test_fuzz_recipe_reader(doc, check_files):
    from gyrometer.core.recipe import load_any, load_recipe

    path = _fresh(".toml", doc)
    _only_our_errors(lambda: load_recipe(path, check_files=check_files))
    _only_our_errors(lambda: load_any(path, check_files=False))


@_fuzz_settings("session")
@given(doc=_documents(session=True))
def test_fuzz_session_reader(doc):
    from gyrometer.core.session import load_session, session_to_toml

    path = _fresh(".session.toml", doc)
    session = _only_our_errors(lambda: load_session(path))
    if not isinstance(session, GyrometerError):
        # what was read can be written back and read again identically
        again = _fresh(".session.toml", session_to_toml(session).encode("utf-8"))
        from gyrometer.core.session import load_session as reload
        assert session_to_toml(reload(again)) == session_to_toml(session)


# -- region files ------------------------------------------------------------------
_NUM = st.one_of(st.floats(-400, 400), st.floats(),
                 st.sampled_from([150.0, 2.0, 150.001, 1.999, 0.0]))


@st.composite
def _region_files(draw):
    lines = []
    if draw(st.booleans()):
        lines.append("# Region file format: DS9 version 4.1")
    lines.append(draw(st.sampled_from(["icrs", "fk5", "image", "galactic",
                                       "physical", "bogus", ""])))
    for _ in range(draw(st.integers(0, 5))):
        shape = draw(st.sampled_from(["polygon", "box", "circle", "point",
                                      "ellipse", "line", "annulus", "text",
                                      "vector", "# polygon", "-polygon"]))
        numbers = draw(st.lists(_NUM, max_size=10))
        args = ",".join(f"{x:.9g}" if isinstance(x, float) else str(x)
                        for x in numbers)
        tail = draw(st.sampled_from(["", " # text={slit 1}", " # color=red",
                                     " # tag={gyrometer}", "\"", " {"]))
        lines.append(f"{shape}({args}){tail}")
    if draw(st.booleans()):
        lines.append(draw(st.text(max_size=30)))
    return "\n".join(lines).encode("utf-8", "replace")


@_fuzz_settings("regions")
@given(text=_region_files(), suffix=st.sampled_from([".reg", ".crtf"]))
def test_fuzz_region_reader(text, suffix):
    from gyrometer.core.regionfiles import read_slit_regions

    path = _fresh(suffix, text)
    geometry = DiskGeometry(150.0, 2.0, 30.0, 50.0)
    _only_our_errors(lambda: read_slit_regions(path, geometry))


# -- regressions found by the fuzzer ----------------------------------------------
# (each one a former crash; the reader now answers with a GyrometerError)


def test_regression_unparsable_card_is_an_input_file_error():
    # found by test_fuzz_cube_reader: a NUL byte inside a string value made
    # astropy's HDUList.fileinfo raise ValueError("Unparsable card") from
    # the truncation check of gyrometer.core.fitsio._open
    from gyrometer.core.errors import InputFileError
    from gyrometer.core.fitsio import load_cube, open_data

    data = bytearray(_BASE_CUBE)
    _set_card(data, "CTYPE1", "'\x00RA---TAN'", 0)
    path = _fresh(".fits", bytes(data))
    for reader in (load_cube, open_data):
        with pytest.raises(InputFileError, match="invalid FITS header"):
            reader(path)


def _open_paths(info) -> set[str]:
    """Files this process holds open (Linux /proc), else the astropy file
    objects still open in the traceback's frames."""
    fd_dir = Path("/proc/self/fd")
    if fd_dir.is_dir():
        paths = set()
        for fd in fd_dir.iterdir():
            try:
                paths.add(os.readlink(fd))
            except OSError:
                pass
        return paths
    from astropy.io.fits.file import _File
    paths, tb = set(), info.tb
    while tb is not None:
        for value in tb.tb_frame.f_locals.values():
            if isinstance(value, _File) and not value.closed:
                paths.add(str(value.name))
        tb = tb.tb_next
    return paths


def test_regression_failed_open_leaves_no_file_open():
    # astropy leaves the file open when fits.open fails part way (the
    # half-built HDU list lives on in the traceback); the reader closes it
    from gyrometer.core.errors import InputFileError
    from gyrometer.core.fitsio import load_cube

    data = bytearray(_BASE_CUBE)
    _set_card(data, "NAXIS", "24", 0)   # astropy fails looking for NAXIS4
    path = _fresh(".fits", bytes(data))
    with pytest.raises(InputFileError) as info:
        load_cube(path)
    assert str(path.resolve()) not in _open_paths(info)


@pytest.mark.parametrize("key, value", [("BMAJ", "'\x00  0.0005'"),
                                        ("BMAJ", "'five'"),
                                        ("RESTFRQ", "'HI line'")])
def test_regression_text_in_an_optional_number_is_ignored(key, value):
    # found by the long fuzz run: BMAJ holding text made float() raise
    # ValueError in gyrometer.core.fitsio._psf_arcsec
    from gyrometer.core.fitsio import load_cube

    data = bytearray(_BASE_CUBE)
    _set_card(data, key, value, 0)
    cube = _only_our_errors(lambda: load_cube(_fresh(".fits", bytes(data))))
    if not isinstance(cube, GyrometerError):
        assert cube.psf_fwhm_arcsec is None or cube.psf_fwhm_arcsec > 0


@pytest.mark.parametrize("key, value", [("BSCALE", "'two'"), ("BZERO", "'x'")])
def test_regression_text_in_bscale_or_bzero_is_a_header_error(key, value):
    from gyrometer.core.errors import GyrometerError as Base
    from gyrometer.core.fitsio import load_cube

    data = bytearray(_BASE_CUBE)
    _set_card(data, "OBJECT", "", 0, raw=f"{key:<8}= {value:>20}")  # add it
    with pytest.raises(Base, match=key):
        load_cube(_fresh(".fits", bytes(data)))


@pytest.mark.parametrize("ops, message", [
    # NAXIS = 10^8 made astropy look for 10^8 NAXISn keywords (minutes)
    ([("card", "NAXIS", "100000000", 1)], "NAXIS = 100000000 is outside 0-999"),
    # a negative GCOUNT made astropy loop
    ([("card", "GCOUNT", "-32", 1)], "GCOUNT = -32 are invalid"),
    # an END card lost: the next header was read as part of this one
    ([("card", "END", "5", 0), ("card", "NAXIS", "1000000", 3)],
     "no END card before the next header"),
    # a zero-length image hid a later, absurd extension header
    ([("card", "NAXIS1", "0", 0), ("card", "NAXIS", "100000000", 3)],
     "NAXIS = 100000000 is outside 0-999"),
])
def test_regression_absurd_structure_is_refused_quickly(ops, message):
    # found by the long fuzz run of the map-set reader: each took seconds
    # to minutes and gigabytes inside astropy before failing; the structure
    # check of gyrometer.core.fitsio now refuses them first (the message
    # names the keyword)
    from gyrometer.core.errors import InputFileError
    from gyrometer.core.fitsio import load_mapset

    path = _fresh(".fits", _mutate(_BASE_MAPS, ops))
    with pytest.raises(InputFileError, match=message):
        load_mapset(path)


def test_regression_odd_byte_in_a_primary_keyword_of_a_map_set():
    # found by the long fuzz run: a non-ASCII byte in a primary-header
    # keyword made fits.Header(dict(header)) raise ValueError in load_mapset
    from gyrometer.core.fitsio import load_mapset

    path = _fresh(".fits", _mutate(_BASE_MAPS, [("bytes", 242, b"\xaf")]))
    _only_our_errors(lambda: load_mapset(path))
