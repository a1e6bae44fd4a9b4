"""Diagnostics: convergence with slit length, PA sensitivity, warnings."""

import warnings

import numpy as np
import pytest

from gyrometer.core import synthetic as syn
from gyrometer.core.diagnostics import (INCLINATION_RANGE_DEG, check_measurement,
                                        convergence, pa_sensitivity)
from gyrometer.core.errors import (ConvergenceWarning, DataQualityWarning,
                                   GeometryWarning, TracerWarning)
from gyrometer.core.dataset import MapSet
from gyrometer.core.slits import SlitSet
from gyrometer.core.tw import measure

SLITS = SlitSet.generate(7, 5.0, 4.0, 60.0)


def model(inc=50.0, **kw):
    geo = syn._default_geometry(pa_deg=30.0, inc_deg=inc)
    kw.setdefault("shape", (64, 64))
    kw.setdefault("pixel_scale_arcsec", 2.0)
    return syn.barred_model(geometry=geo, bar_radius_kpc=3.0, **kw)


def test_long_slits_converge_and_short_ranges_do_not():
    maps, truth = syn.make_maps(model(), noise=False)
    curves = convergence(maps, truth.geometry, SLITS,
                         half_lengths=np.linspace(20.0, 60.0, 9))
    assert curves.x_mean_arcsec.shape == (7, 9)
    # the bar (3 kpc = 31") is inside 48-60": the integrals have plateaued
    assert np.all(curves.converged)
    assert curves.omega_p_kms_arcsec[-1] == pytest.approx(truth.omega_p_kms_arcsec[0],
                                                          rel=0.02)
    # slits stopping inside the bar have not converged
    with pytest.warns(ConvergenceWarning):
        short = convergence(maps, truth.geometry, SLITS,
                            half_lengths=np.linspace(4.0, 12.0, 6))
    assert not np.all(short.converged)


def test_pa_sensitivity_is_centred_on_the_nominal_measurement():
    maps, truth = syn.make_maps(model(), noise=False)
    sens = pa_sensitivity(maps, truth.geometry, SLITS)
    assert np.allclose(sens.pa_offset_deg, np.arange(-10, 11, 2))
    nominal = measure(maps, truth.geometry, SLITS, warn=False).omega_p_kms_arcsec
    assert sens.omega_p_kms_arcsec[5] == pytest.approx(nominal, rel=1e-12)
    # a wrong PA biases Omega_p by tens of percent at a few degrees (Zou et
    # al. 2019, ApJ 884, 23): well above 2 % at +-10 deg here
    assert np.max(np.abs(sens.omega_p_kms_arcsec / nominal - 1)) > 0.05


def _caught(func, *args, **kw):
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        result = func(*args, **kw)
    return result, [(w.category, str(w.message)) for w in record]


SHORT = SlitSet.generate(7, 5.0, 4.0, 45.0)           # inside the 128" map


def test_inclination_outside_the_reliable_range_warns():
    assert INCLINATION_RANGE_DEG == (15.0, 70.0)      # Zou et al. 2019
    maps, truth = syn.make_maps(model(inc=78.0), noise=False)
    m, caught = _caught(measure, maps, truth.geometry, SHORT)
    assert any(c is GeometryWarning and "Zou et al. 2019" in t for c, t in caught)
    assert any("inclination" in w for w in m.warnings)


def test_few_slits_noise_and_gas_tracer_warn():
    maps, truth = syn.make_maps(model(), noise=False)
    two = SlitSet.generate(2, 10.0, 4.0, 45.0)
    m = measure(maps, truth.geometry, two, warn=False)
    texts, caught = _caught(check_measurement, m, tracer="stars")
    assert any("only 2 slit" in t for t in texts)
    assert [c for c, _ in caught] == [DataQualityWarning] * len(texts)
    drowned = MapSet(maps.intensity, maps.velocity_kms, maps.wcs,
                     intensity_err=maps.intensity_err * 3000.0,
                     velocity_err_kms=maps.velocity_err_kms)
    m7 = measure(drowned, truth.geometry, SHORT, warn=False)
    texts = check_measurement(m7, issue=False)
    assert any("dominated by noise" in t for t in texts)
    clean = measure(maps, truth.geometry, SHORT, warn=False)
    assert not any("dominated by noise" in t for t in check_measurement(clean, issue=False))
    _, caught = _caught(check_measurement, clean, tracer="HI")
    assert any(c is TracerWarning and "Borodina" in t for c, t in caught)


def test_clean_measurement_has_no_warnings():
    maps, truth = syn.make_maps(model(), noise=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        m = measure(maps, truth.geometry, SHORT)
    assert m.warnings == ()


def test_warnings_number_slits_from_one_as_the_app_table_does():
    """User-facing slit numbers start at 1 (the app and region files count from 1)."""
    import numpy as np

    from gyrometer.core.diagnostics import check_measurement
    from gyrometer.core.geometry import DiskGeometry
    from gyrometer.core.results import LineFit, SlitIntegrals, TWMeasurement

    n = 3
    ones = np.ones(n)
    integrals = SlitIntegrals(
        offset_arcsec=np.array([-1.0, 0.0, 1.0]), x_mean_arcsec=ones,
        x_err_arcsec=0.1 * ones, v_mean_kms=ones, v_err_kms=ones,
        xv_corr=0 * ones, flux=ones, flux_err=np.array([0.1, 0.1, 10.0]),
        n_pixels=np.array([10, 10, 10]), coverage=ones,
        truncated=np.array([True, False, False]), half_length_used_arcsec=ones)
    fit = LineFit(1.0, 0.0, 0.1, 0.1, 0.0, 1.0, 1, "test")
    geometry = DiskGeometry(10.0, 10.0, 30.0, 45.0)
    m = TWMeasurement(integrals, fit, np.ones(n, bool), geometry, "maps", 1.0, 0.1)
    text = " | ".join(check_measurement(m, issue=False))
    assert "slit(s) 3 are dominated by noise" in text   # the third slit
    assert "slit(s) 1 are cut by the field" in text     # the first slit
