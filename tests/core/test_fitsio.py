"""Tests of the FITS readers and writers (gyrometer.core.fitsio).

Reference values: the FITS standard 4.0 and Greisen et al. (2006, A&A 446,
747) for keywords and spectral types; astropy.wcs (WCSLIB) as the reference
implementation of the WCS; hashlib for checksums.
"""

from __future__ import annotations

import hashlib

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS

from gyrometer.core.dataset import Cube, MapSet, Provenance, SpectralAxis
from gyrometer.core.errors import (DataContentError, DataQualityWarning,
                                   HeaderError, InputFileError,
                                   MapMismatchError, OutputError,
                                   SpectralAxisError, UnitError)
from gyrometer.core.fitsio import (file_sha256, load_cube, load_mapset,
                                   open_data, write_cube, write_mapset)
from gyrometer.core.spectral import channel_velocities

NY, NX, NC = 6, 7, 12


def _celestial_cards(header: fits.Header, *, rotation_deg: float = 0.0,
                     cd: bool = False, axes: tuple[int, int] = (1, 2)) -> None:
    """Put a TAN celestial WCS with CDELT1 < 0 (east left) in ``header``."""
    a, b = axes
    header[f"CTYPE{a}"] = "RA---TAN"
    header[f"CTYPE{b}"] = "DEC--TAN"
    header[f"CRVAL{a}"] = 150.1
    header[f"CRVAL{b}"] = -2.3
    header[f"CRPIX{a}"] = 3.5
    header[f"CRPIX{b}"] = 2.0
    cdelt = np.array([-0.2, 0.25]) / 3600.0
    theta = np.deg2rad(rotation_deg)
    pc = np.array([[np.cos(theta), -np.sin(theta)],
                   [np.sin(theta), np.cos(theta)]])
    if cd:
        matrix = np.diag(cdelt) @ pc
        for i, p in enumerate((a, b)):
            for j, q in enumerate((a, b)):
                header[f"CD{p}_{q}"] = matrix[i, j]
    else:
        header[f"CDELT{a}"] = cdelt[0]
        header[f"CDELT{b}"] = cdelt[1]
        for i, p in enumerate((a, b)):
            for j, q in enumerate((a, b)):
                header[f"PC{p}_{q}"] = pc[i, j]


def _cube_header(ctype3: str = "AWAV", cunit3: str = "Angstrom",
                 crval3: float = 6540.0, cdelt3: float = 1.25, **extra
                 ) -> fits.Header:
    header = fits.Header()
    _celestial_cards(header)
    header["CTYPE3"] = ctype3
    if cunit3:
        header["CUNIT3"] = cunit3
    header["CRVAL3"] = crval3
    header["CDELT3"] = cdelt3
    header["CRPIX3"] = 1.0
    for key, value in extra.items():
        header[key] = value
    return header


def _data(shape=(NC, NY, NX), seed=1) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=shape).astype(np.float32)


def _write(path, data, header, extensions=()):
    hdus = [fits.PrimaryHDU(data=data, header=header), *extensions]
    fits.HDUList(hdus).writeto(path)
    return path


def _celestial_wcs(rotation_deg=0.0, cd=False) -> WCS:
    header = fits.Header()
    _celestial_cards(header, rotation_deg=rotation_deg, cd=cd)
    return WCS(header)


def _cube(air=True, variance=True) -> Cube:
    axis = SpectralAxis("AWAV", 6540.0 + 1.25 * np.arange(NC), "Angstrom",
                        rest_value=6564.608, rest_unit="Angstrom",
                        convention="optical", air=air, specsys="BARYCENT")
    return Cube(_data(), _celestial_wcs(25.0), axis, "1e-20 erg/(s cm2 Angstrom)",
                Provenance("", ""),
                variance=np.full((NC, NY, NX), 0.25, np.float32) if variance
                else None, name="LBDP-011", psf_fwhm_arcsec=0.7)


def _mapset() -> MapSet:
    rng = np.random.default_rng(3)
    shape = (NY, NX)
    return MapSet(intensity=rng.uniform(1, 2, shape),
                  velocity_kms=rng.normal(1500, 50, shape),
                  wcs=_celestial_wcs(-40.0),
                  intensity_err=np.full(shape, 0.1),
                  velocity_err_kms=np.full(shape, 5.0),
                  dispersion_kms=np.full(shape, 60.0),
                  dispersion_err_kms=np.full(shape, 4.0),
                  intensity_unit="Jy/beam km/s", name="LBDP-023",
                  tracer="CO", psf_fwhm_arcsec=1.1,
                  velocity_convention="radio", specsys="LSRK")


def _sky(wcs: WCS, shape) -> np.ndarray:
    y, x = np.mgrid[0:shape[0], 0:shape[1]]
    coords = wcs.pixel_to_world(x.ravel(), y.ravel())
    return np.stack([coords.ra.deg, coords.dec.deg])


# --------------------------------------------------------------------------
# writers and round trips
# --------------------------------------------------------------------------

def test_write_cube_then_load_cube_round_trips_everything(tmp_path):
    cube = _cube()
    path = write_cube(tmp_path / "c.fits", cube)
    back = load_cube(path)
    np.testing.assert_array_equal(back.data, cube.data)
    np.testing.assert_array_equal(back.variance, cube.variance)
    np.testing.assert_allclose(back.spectral.values, cube.spectral.values,
                               rtol=0, atol=1e-9)
    assert back.spectral.ctype == "AWAV" and back.spectral.air
    assert back.spectral.rest_value == pytest.approx(6564.608, abs=1e-9)
    assert back.spectral.rest_unit == "Angstrom"
    assert back.spectral.specsys == "BARYCENT"
    assert back.spectral.convention == "optical"
    assert back.name == "LBDP-011" and back.psf_fwhm_arcsec == 0.7
    assert back.unit == cube.unit
    np.testing.assert_allclose(_sky(back.wcs, (NY, NX)),
                               _sky(cube.wcs, (NY, NX)), rtol=0, atol=1e-10)


def test_write_cube_is_byte_identical_and_dateless(tmp_path):
    a = write_cube(tmp_path / "a.fits", _cube())
    b = write_cube(tmp_path / "b.fits", _cube())
    assert a.read_bytes() == b.read_bytes()
    header = fits.getheader(a)
    assert not any(key.startswith(("DATE", "MJD")) for key in header)


def test_write_cube_refuses_to_overwrite(tmp_path):
    path = write_cube(tmp_path / "c.fits", _cube())
    with pytest.raises(OutputError, match="exists"):
        write_cube(path, _cube())
    write_cube(path, _cube(variance=False), overwrite=True)
    assert load_cube(path).variance is None


def test_write_cube_log_axis_round_trips(tmp_path):
    # log-lambda axis (WCSLIB -LOG algorithm, Greisen et al. 2006 sec. 5.3)
    values = 3600.0 * 10 ** (1e-4 * np.arange(NC))
    cube = _cube()
    axis = SpectralAxis("WAVE", values, "Angstrom", 6564.608, "Angstrom")
    cube = Cube(cube.data, cube.wcs, axis, "", Provenance("", ""))
    back = load_cube(write_cube(tmp_path / "log.fits", cube))
    assert back.spectral.ctype == "WAVE-LOG"
    np.testing.assert_allclose(back.spectral.values, values, rtol=1e-12)


def test_write_mapset_round_trips_and_is_deterministic(tmp_path):
    maps = _mapset()
    a = write_mapset(tmp_path / "a.fits", maps)
    b = write_mapset(tmp_path / "b.fits", maps)
    assert a.read_bytes() == b.read_bytes()
    with fits.open(a) as hdul:
        assert [h.name for h in hdul[1:]] == [
            "INTENSITY", "INTENSITY_ERR", "VELOCITY", "VELOCITY_ERR",
            "DISPERSION", "DISPERSION_ERR"]
        assert hdul[0].header["VCONV"] == "radio"
        assert hdul["VELOCITY"].header["BUNIT"] == "km/s"
    back = load_mapset(a)
    for name in ("intensity", "velocity_kms", "intensity_err",
                 "velocity_err_kms", "dispersion_kms", "dispersion_err_kms"):
        np.testing.assert_array_equal(getattr(back, name), getattr(maps, name))
    assert (back.name, back.tracer, back.velocity_convention, back.specsys,
            back.psf_fwhm_arcsec, back.intensity_unit) == (
        "LBDP-023", "CO", "radio", "LSRK", 1.1, "Jy/beam km/s")
    np.testing.assert_allclose(_sky(back.wcs, (NY, NX)),
                               _sky(maps.wcs, (NY, NX)), atol=1e-10)
    assert back.provenance[0].sha256 == hashlib.sha256(a.read_bytes()).hexdigest()


def test_open_data_sniffs_cube_and_mapset(tmp_path):
    assert isinstance(open_data(write_cube(tmp_path / "c.fits", _cube())), Cube)
    assert isinstance(open_data(write_mapset(tmp_path / "m.fits", _mapset())),
                      MapSet)


# --------------------------------------------------------------------------
# reading real-world layouts
# --------------------------------------------------------------------------

def test_load_cube_finds_data_and_stat_extensions(tmp_path):
    # IFU layout: empty primary, DATA + STAT (variance) extensions
    primary = fits.PrimaryHDU()
    primary.header["OBJECT"] = "LBDP-037"
    data, stat = _data(), np.full((NC, NY, NX), 4.0, np.float32)
    header = _cube_header()
    hdus = fits.HDUList([primary, fits.ImageHDU(data, header, name="DATA"),
                         fits.ImageHDU(stat, header, name="STAT")])
    hdus.writeto(tmp_path / "ifu.fits")
    cube = load_cube(tmp_path / "ifu.fits")
    assert cube.provenance.hdu == "DATA" and cube.name == "LBDP-037"
    np.testing.assert_array_equal(cube.data, data)
    np.testing.assert_array_equal(cube.variance, stat)
    assert not cube.data.flags.writeable
    assert cube.provenance.sha256 == file_sha256(tmp_path / "ifu.fits")


@pytest.mark.parametrize("name, stored, variance", [
    ("IVAR", 4.0, 0.25),   # inverse variance is inverted
    ("ERR", 3.0, 9.0),     # standard deviation is squared
    ("VARIANCE", 2.0, 2.0),
])
def test_load_cube_turns_uncertainty_extensions_into_variance(
        tmp_path, name, stored, variance):
    header = _cube_header()
    errors = fits.ImageHDU(np.full((NC, NY, NX), stored, np.float32), header,
                           name=name)
    _write(tmp_path / "c.fits", _data(), header, [errors])
    cube = load_cube(tmp_path / "c.fits")
    np.testing.assert_allclose(cube.variance, variance, rtol=1e-6)


def test_load_cube_drops_stokes_axis_and_reads_beam(tmp_path):
    header = _cube_header("FREQ", "Hz", 230.4e9, -0.5e6, RESTFRQ=230.538e9,
                          SPECSYS="LSRK", BMAJ=0.5 / 3600, BMIN=0.4 / 3600)
    header["CTYPE4"] = "STOKES"
    header["CRVAL4"], header["CDELT4"], header["CRPIX4"] = 1.0, 1.0, 1.0
    data = _data((1, NC, NY, NX))
    _write(tmp_path / "radio.fits", data, header)
    cube = load_cube(tmp_path / "radio.fits")
    assert cube.shape == (NC, NY, NX)
    np.testing.assert_array_equal(cube.data, data[0])
    assert cube.psf_fwhm_arcsec == pytest.approx(0.5)  # BMAJ is in degrees
    assert cube.spectral.ctype == "FREQ"
    assert cube.spectral.convention == "radio"
    assert cube.spectral.rest_value == pytest.approx(230.538e9)
    assert cube.spectral.rest_unit == "Hz"
    np.testing.assert_allclose(cube.spectral.values,
                               230.4e9 - 0.5e6 * np.arange(NC))


def test_load_cube_reorders_axes_when_spectral_axis_is_first(tmp_path):
    header = fits.Header()
    _celestial_cards(header, axes=(2, 3))
    header["CTYPE1"], header["CUNIT1"] = "VRAD", "km/s"
    header["CRVAL1"], header["CDELT1"], header["CRPIX1"] = 100.0, 5.0, 1.0
    data = _data((NY, NX, NC))  # numpy order (dec, ra, spectral)
    _write(tmp_path / "c.fits", data, header)
    cube = load_cube(tmp_path / "c.fits")
    np.testing.assert_array_equal(cube.data, np.transpose(data, (2, 0, 1)))
    np.testing.assert_allclose(cube.spectral.values, 100.0 + 5 * np.arange(NC))


@pytest.mark.parametrize("ctype, cunit, crval, cdelt, expected_ctype, unit, first", [
    ("WAVE", "nm", 654.0, 0.125, "WAVE", "Angstrom", 6540.0),
    ("WAVE", "um", 0.654, 0.000125, "WAVE", "Angstrom", 6540.0),
    ("WAVE", "m", 6.54e-7, 1.25e-11, "WAVE", "Angstrom", 6540.0),
    ("VRAD", "km/s", 1200.0, 5.0, "VRAD", "km / s", 1200.0),
    ("VOPT", "m/s", 1.2e6, 5e3, "VOPT", "km / s", 1200.0),
    ("VELO", "m/s", 1.2e6, 5e3, "VELO", "km / s", 1200.0),
])
def test_load_cube_reads_spectral_types_and_units(
        tmp_path, ctype, cunit, crval, cdelt, expected_ctype, unit, first):
    header = _cube_header(ctype, cunit, crval, cdelt, RESTFRQ=1.0e15,
                          RESTWAV=6564.608e-10)
    _write(tmp_path / "c.fits", _data(), header)
    axis = load_cube(tmp_path / "c.fits").spectral
    assert axis.ctype == expected_ctype and axis.unit == unit
    assert axis.values[0] == pytest.approx(first, rel=1e-12)
    assert not axis.air


@pytest.mark.parametrize("ctype, velref, expected, convention", [
    # AIPS types translated by WCSLIB spcfix; VELREF 257 = LSR + radio flag
    ("VELO-LSR", 257, "VRAD", "radio"),
    ("FELO-HEL", 2, "VOPT-F2W", "optical"),
])
def test_load_cube_translates_aips_velocity_axes(tmp_path, ctype, velref,
                                                 expected, convention):
    header = _cube_header(ctype, "m/s", 1.0e6, 1.0e4, VELREF=velref,
                          RESTFRQ=1420.405751768e6)
    _write(tmp_path / "c.fits", _data(), header)
    axis = load_cube(tmp_path / "c.fits").spectral
    assert axis.ctype == expected and axis.convention == convention
    assert axis.values[0] == pytest.approx(1000.0, rel=1e-6)
    assert axis.values[1] - axis.values[0] == pytest.approx(10.0, rel=1e-3)


def test_load_cube_scales_integer_data_in_chunks(tmp_path):
    raw = np.arange(NC * NY * NX, dtype=np.int16).reshape(NC, NY, NX)
    header = _cube_header()
    hdu = fits.PrimaryHDU(raw, header)
    hdu.header["BSCALE"], hdu.header["BZERO"], hdu.header["BLANK"] = 0.5, 10.0, 7
    hdu.writeto(tmp_path / "int.fits")
    cube = load_cube(tmp_path / "int.fits")
    assert cube.data.dtype == np.float32
    expected = raw * 0.5 + 10.0
    expected[raw == 7] = np.nan
    np.testing.assert_array_equal(cube.data, expected.astype(np.float32))


@pytest.mark.parametrize("cd", [False, True])
@pytest.mark.parametrize("rotation", [0.0, 33.0, -120.0])
def test_celestial_wcs_pixel_sky_pixel_round_trip(tmp_path, cd, rotation):
    header = _cube_header()
    _celestial_cards(header, rotation_deg=rotation, cd=cd)
    _write(tmp_path / "c.fits", _data(), header)
    wcs = load_cube(tmp_path / "c.fits").wcs
    reference = WCS(header).celestial  # astropy/WCSLIB on the same header
    y, x = np.mgrid[0:NY, 0:NX].astype(float) + 0.25
    sky = wcs.pixel_to_world(x, y)
    ref = reference.pixel_to_world(x, y)
    assert np.max(sky.separation(ref).to_value(u.arcsec)) < 1e-9
    x2, y2 = wcs.world_to_pixel(sky)
    np.testing.assert_allclose(x2, x, atol=1e-8)
    np.testing.assert_allclose(y2, y, atol=1e-8)
    # CDELT1 < 0: east is towards -x when unrotated (common practice)
    if rotation == 0.0:
        east = wcs.pixel_to_world(1.0, 0.0).ra.deg - wcs.pixel_to_world(0.0, 0.0).ra.deg
        assert east < 0


# --------------------------------------------------------------------------
# map sets from several files and synonyms
# --------------------------------------------------------------------------

def _map_file(path, data, bunit=None, rotation=-40.0, **extra):
    header = fits.Header()
    _celestial_cards(header, rotation_deg=rotation)
    if bunit is not None:
        header["BUNIT"] = bunit
    for key, value in extra.items():
        header[key] = value
    fits.PrimaryHDU(np.asarray(data, dtype=np.float32), header).writeto(path)
    return path


def test_load_mapset_from_single_files_converts_m_per_s(tmp_path):
    flux = _map_file(tmp_path / "flux.fits", np.ones((NY, NX)), "Jy")
    vel = _map_file(tmp_path / "vel.fits", np.full((NY, NX), 1.5e6), "m/s")
    maps = load_mapset(intensity=flux, velocity=vel, tracer="HI")
    np.testing.assert_allclose(maps.velocity_kms, 1500.0)
    assert maps.tracer == "HI" and len(maps.provenance) == 2


def test_load_mapset_accepts_common_extension_names(tmp_path):
    header = fits.Header()
    _celestial_cards(header)
    header["BUNIT"] = "km s-1"
    hdus = fits.HDUList([
        fits.PrimaryHDU(),
        fits.ImageHDU(np.full((NY, NX), 2.0), header, name="FLUX"),
        fits.ImageHDU(np.full((NY, NX), 900.0), header, name="VEL"),
        fits.ImageHDU(np.full((NY, NX), 0.04), header, name="VEL_IVAR"),
        fits.ImageHDU(np.full((NY, NX), 80.0), header, name="SIGMA"),
    ])
    hdus.writeto(tmp_path / "maps.fits")
    maps = load_mapset(tmp_path / "maps.fits")
    np.testing.assert_allclose(maps.velocity_kms, 900.0)
    np.testing.assert_allclose(maps.velocity_err_kms, 5.0)  # 1/sqrt(0.04)
    np.testing.assert_allclose(maps.dispersion_kms, 80.0)
    assert maps.intensity_err is None


def test_load_mapset_without_bunit_warns_and_assumes_km_per_s(tmp_path):
    flux = _map_file(tmp_path / "flux.fits", np.ones((NY, NX)))
    vel = _map_file(tmp_path / "vel.fits", np.full((NY, NX), 10.0))
    with pytest.warns(DataQualityWarning, match="no BUNIT"):
        maps = load_mapset(intensity=flux, velocity=vel)
    np.testing.assert_allclose(maps.velocity_kms, 10.0)
    maps = load_mapset(intensity=flux, velocity=vel, velocity_unit="m/s")
    np.testing.assert_allclose(maps.velocity_kms, 0.01)


# --------------------------------------------------------------------------
# bad input: one clear project error naming the file and the fault
# --------------------------------------------------------------------------

def test_missing_file(tmp_path):
    with pytest.raises(InputFileError, match="nope.fits.*not found"):
        load_cube(tmp_path / "nope.fits")


def test_not_fits(tmp_path):
    path = tmp_path / "notes.fits"
    path.write_text("hello, this is text\n")
    with pytest.raises(InputFileError, match="notes.fits.*not a FITS file"):
        load_cube(path)


def test_truncated_file(tmp_path):
    path = write_cube(tmp_path / "c.fits", _cube(variance=False))
    content = path.read_bytes()
    cut = tmp_path / "cut.fits"
    cut.write_bytes(content[: len(content) - 2880 + 1000])  # half the data
    with pytest.raises(InputFileError, match="cut.fits.*truncated"):
        load_cube(cut)


def test_2d_data_where_cube_needed(tmp_path):
    path = _map_file(tmp_path / "map.fits", np.ones((NY, NX)), "Jy")
    with pytest.raises(DataContentError, match="map.fits.*no 3D cube"):
        load_cube(path)


def test_no_spectral_axis(tmp_path):
    header = _cube_header()
    for key in ("CTYPE3", "CUNIT3"):
        del header[key]
    _write(tmp_path / "c.fits", _data(), header)
    with pytest.raises(SpectralAxisError, match="c.fits.*no spectral axis"):
        load_cube(tmp_path / "c.fits")


def test_unknown_spectral_ctype(tmp_path):
    _write(tmp_path / "c.fits", _data(), _cube_header("CHANNEL", ""))
    with pytest.raises(SpectralAxisError,
                       match="c.fits.*unknown spectral axis type 'CHANNEL'"):
        load_cube(tmp_path / "c.fits")


def test_no_celestial_wcs(tmp_path):
    header = _cube_header()
    header["CTYPE1"], header["CTYPE2"] = "LINEAR", "LINEAR"
    _write(tmp_path / "c.fits", _data(), header)
    with pytest.raises(HeaderError, match="c.fits.*no celestial WCS"):
        load_cube(tmp_path / "c.fits")


def test_velocity_conversion_without_rest_value(tmp_path):
    _write(tmp_path / "c.fits", _data(), _cube_header("FREQ", "Hz", 1.4e9, 1e5))
    cube = load_cube(tmp_path / "c.fits")
    assert cube.spectral.rest_value is None
    with pytest.raises(SpectralAxisError, match="RESTFRQ"):
        channel_velocities(cube.spectral)


def test_all_nan_data(tmp_path):
    _write(tmp_path / "c.fits", np.full((NC, NY, NX), np.nan, np.float32),
           _cube_header())
    with pytest.raises(DataContentError, match="c.fits.*all NaN"):
        load_cube(tmp_path / "c.fits")


def test_empty_data(tmp_path):
    _write(tmp_path / "c.fits", None, _cube_header())
    with pytest.raises(DataContentError, match="c.fits"):
        load_cube(tmp_path / "c.fits")


def test_maps_with_different_shapes(tmp_path):
    flux = _map_file(tmp_path / "flux.fits", np.ones((NY, NX + 1)), "Jy")
    vel = _map_file(tmp_path / "vel.fits", np.ones((NY, NX)), "km/s")
    with pytest.raises(MapMismatchError, match="flux.fits.*vel.fits"):
        load_mapset(intensity=flux, velocity=vel)


def test_maps_with_different_wcs(tmp_path):
    flux = _map_file(tmp_path / "flux.fits", np.ones((NY, NX)), "Jy",
                     rotation=10.0)
    vel = _map_file(tmp_path / "vel.fits", np.ones((NY, NX)), "km/s",
                    rotation=-40.0)
    with pytest.raises(MapMismatchError, match="flux.fits.*vel.fits"):
        load_mapset(intensity=flux, velocity=vel)


def test_velocity_map_with_a_unit_that_is_not_a_velocity(tmp_path):
    flux = _map_file(tmp_path / "flux.fits", np.ones((NY, NX)), "Jy")
    vel = _map_file(tmp_path / "vel.fits", np.ones((NY, NX)), "Jy/beam")
    with pytest.raises(UnitError, match="vel.fits.*BUNIT.*not a velocity"):
        load_mapset(intensity=flux, velocity=vel)


def test_mapset_from_a_cube_file_says_so(tmp_path):
    path = write_cube(tmp_path / "c.fits", _cube())
    with pytest.raises(DataContentError, match="c.fits.*cube, not a map set"):
        load_mapset(path)


def test_load_cube_by_hdu_name_and_unknown_name(tmp_path):
    header = _cube_header()
    data = _data()
    hdus = fits.HDUList([fits.PrimaryHDU(),
                         fits.ImageHDU(data, header, name="LINECUBE")])
    hdus.writeto(tmp_path / "c.fits")
    cube = load_cube(tmp_path / "c.fits", hdu="LINECUBE")
    np.testing.assert_array_equal(cube.data, data)
    assert cube.provenance.hdu == "LINECUBE"
    with pytest.raises(InputFileError, match="c.fits.*no HDU named 'FLUX'"):
        load_cube(tmp_path / "c.fits", hdu="FLUX")


def test_load_cube_applies_unsigned_16_bit_convention(tmp_path):
    # FITS standard 4.0 sec. 5.2.5: unsigned integers stored with BZERO 32768
    values = np.array([0, 1, 40000, 65535], dtype=np.uint16)
    raw = np.resize(values, NC * NY * NX).reshape(NC, NY, NX)
    fits.PrimaryHDU(raw, _cube_header()).writeto(tmp_path / "u16.fits")
    assert fits.getheader(tmp_path / "u16.fits")["BZERO"] == 32768
    cube = load_cube(tmp_path / "u16.fits")
    np.testing.assert_array_equal(cube.data, raw.astype(np.float32))


def test_cube_data_stay_float32_memory_map(tmp_path):
    path = write_cube(tmp_path / "c.fits", _cube())
    cube = load_cube(path)
    assert cube.data.dtype.itemsize == 4  # never promoted to float64
    base = cube.data
    while getattr(base, "base", None) is not None and not isinstance(base, np.memmap):
        base = base.base
    assert isinstance(base, np.memmap) or "mmap" in type(base).__name__
