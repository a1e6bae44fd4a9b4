"""Tests of channel velocities and air/vacuum conversion
(gyrometer.core.spectral).

Reference values and their sources are named beside each check; the
conventions are those of Greisen et al. (2006, A&A 446, 747, Table 1).
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from astropy.constants import c

from gyrometer.core.dataset import SpectralAxis
from gyrometer.core.errors import SpectralAxisError
from gyrometer.core.spectral import (air_to_vacuum, channel_velocities,
                                     refractive_index, vacuum_to_air)

C_KMS = c.to_value(u.km / u.s)
CO10_REST_HZ = 115.27120e9  # rest value used in the astropy docstrings


def _freq_axis(values_hz, rest_hz=CO10_REST_HZ):
    return SpectralAxis("FREQ", np.asarray(values_hz, float), "Hz",
                        rest_hz, "Hz", "radio")


# --------------------------------------------------------------------------
# conventions: astropy docstring values, astropy equivalencies, by hand
# --------------------------------------------------------------------------

@pytest.mark.parametrize("convention, expected", [
    # astropy.units.doppler_* docstrings: CO 115.27120 GHz rest observed
    # at 115.2832 GHz
    ("radio", -31.209092088877583),
    ("optical", -31.20584348799674),
    ("relativistic", -31.207467619351537),
])
def test_co_check_values_from_astropy_docstrings(convention, expected):
    axis = _freq_axis([115.2832e9, 115.2842e9])
    v_kms, _ = channel_velocities(axis, convention=convention)
    assert v_kms[0] == pytest.approx(expected, abs=1e-8)


def test_conventions_match_hand_formulas_and_astropy():
    nu0, nu = CO10_REST_HZ, np.array([115.0e9, 115.2832e9, 115.5e9])
    axis = _freq_axis(nu)
    by_hand = {  # Greisen et al. 2006, Table 1
        "radio": C_KMS * (nu0 - nu) / nu0,
        "optical": C_KMS * (nu0 / nu - 1),
        "relativistic": C_KMS * (nu0 ** 2 - nu ** 2) / (nu0 ** 2 + nu ** 2),
    }
    equivalencies = {"radio": u.doppler_radio, "optical": u.doppler_optical,
                     "relativistic": u.doppler_relativistic}
    for convention, expected in by_hand.items():
        v_kms, _ = channel_velocities(axis, convention=convention)
        np.testing.assert_allclose(v_kms, expected, rtol=1e-12, atol=1e-9)
        astropy_v = (nu * u.Hz).to_value(
            u.km / u.s, equivalencies=equivalencies[convention](nu0 * u.Hz))
        np.testing.assert_allclose(v_kms, astropy_v, rtol=1e-12, atol=1e-9)


def test_relativistic_1250_kms_check_value():
    # astropy doppler_relativistic docstring: 1250 km/s -> 114.79156866993588 GHz
    axis = _freq_axis([114.79156866993588e9, 114.79e9])
    v_kms, _ = channel_velocities(axis, convention="relativistic")
    assert v_kms[0] == pytest.approx(1250.0, abs=1e-8)


def test_rest_value_can_be_given_as_wavelength_or_line():
    nu0 = 1420.405751768e6  # HI, astropy test value
    axis = _freq_axis(nu0 * (1 - np.array([1e-3, 2e-3])), rest_hz=None)
    via_quantity, _ = channel_velocities(axis, rest=(c / (nu0 * u.Hz)).to(u.cm))
    via_line, _ = channel_velocities(axis, rest="HI")
    np.testing.assert_allclose(via_quantity, C_KMS * np.array([1e-3, 2e-3]),
                               rtol=1e-12)  # radio: V = c (nu0 - nu)/nu0
    np.testing.assert_allclose(via_line, via_quantity, rtol=1e-12)


# --------------------------------------------------------------------------
# channel widths
# --------------------------------------------------------------------------

def test_widths_of_frequency_linear_axis_vary_in_optical_convention():
    nu0, step = CO10_REST_HZ, -2.0e6
    nu = 114.9e9 + step * np.arange(50)
    axis = _freq_axis(nu)
    _, dv_radio = channel_velocities(axis, convention="radio")
    np.testing.assert_allclose(dv_radio, C_KMS * abs(step) / nu0, rtol=1e-9)
    _, dv_opt = channel_velocities(axis, convention="optical")
    edges = np.concatenate([[nu[0] - step / 2], nu + step / 2])
    by_hand = np.abs(np.diff(C_KMS * (nu0 / edges - 1)))  # optical, by hand
    np.testing.assert_allclose(dv_opt, by_hand, rtol=1e-9)
    assert np.ptp(dv_opt) > 1e-4 * dv_opt.mean()  # not constant


def test_decreasing_axis_gives_positive_widths():
    axis = SpectralAxis("VRAD", 300.0 - 5.0 * np.arange(10), "km / s",
                        convention="radio")
    v_kms, dv_kms = channel_velocities(axis)
    np.testing.assert_allclose(v_kms, 300.0 - 5.0 * np.arange(10))
    np.testing.assert_allclose(dv_kms, 5.0)


def test_velocity_axis_changes_convention_without_rest_value():
    v_rad = np.array([0.0, 1000.0, 3000.0])
    axis = SpectralAxis("VRAD", v_rad, "km / s", convention="radio")
    v_opt, _ = channel_velocities(axis, convention="optical")
    # nu/nu0 = 1 - v_rad/c and 1 + v_opt/c = nu0/nu (Greisen et al. 2006)
    np.testing.assert_allclose(v_opt, v_rad / (1 - v_rad / C_KMS), rtol=1e-12)
    back, _ = channel_velocities(
        SpectralAxis("VOPT", v_opt, "km / s", convention="optical"),
        convention="radio")
    np.testing.assert_allclose(back, v_rad, atol=1e-9)


def test_radio_velocity_of_3000_kms_optical():
    # DOMAIN check: V_opt = 3000 km/s is V_rad = 2970.28 km/s (derived)
    axis = SpectralAxis("VOPT", [3000.0, 3010.0], "km / s")
    v_kms, _ = channel_velocities(axis, convention="radio")
    assert v_kms[0] == pytest.approx(2970.28, abs=0.01)


# --------------------------------------------------------------------------
# air and vacuum
# --------------------------------------------------------------------------

def test_ciddor_air_to_vacuum_check_value():
    # IDL astrolib airtovac documentation: 4861.363 (air) -> 4862.721 (vac)
    assert air_to_vacuum(4861.363, "ciddor") == pytest.approx(4862.721, abs=1e-3)


def test_ciddor_vacuum_to_air_check_value():
    # IDL astrolib vactoair documentation: 2000.000 (vac) -> 1999.353 (air)
    assert vacuum_to_air(2000.0, "ciddor") == pytest.approx(1999.353, abs=1e-3)


def test_halpha_vacuum_to_air_morton_and_ciddor_agree():
    # H-alpha 6564.608 vac (MaNGA DAP / NIST Ritz) -> 6562.795 air (derived)
    morton = vacuum_to_air(6564.608, "morton")
    ciddor = vacuum_to_air(6564.608, "ciddor")
    assert morton == pytest.approx(6562.795, abs=1e-3)
    assert abs(morton - ciddor) < 1e-5


def test_greisen_formula_differs_from_morton_by_a_tenth_angstrom():
    # DOMAIN notes: Greisen eq. 65 vs Morton differ by ~0.1 A at H-alpha
    diff = vacuum_to_air(6564.608, "morton") - vacuum_to_air(6564.608, "greisen")
    assert 0.08 < diff < 0.12


@pytest.mark.parametrize("method", ["morton", "ciddor", "greisen"])
def test_air_vacuum_round_trip(method):
    vac = np.linspace(3600.0, 10000.0, 17)
    np.testing.assert_allclose(air_to_vacuum(vacuum_to_air(vac, method), method),
                               vac, atol=1e-8)
    assert np.all(refractive_index(vac, method) > 1.00027)


def test_unknown_air_method_is_rejected():
    with pytest.raises(ValueError, match="unknown air/vacuum method"):
        refractive_index(5000.0, "edlen-guess")


def _air_halpha_axis(rest=6564.608):
    air = vacuum_to_air(6564.608, "morton")  # line centre at rest, in air
    values = air + 1.25 * np.arange(-5, 6)
    return SpectralAxis("AWAV", values, "Angstrom", rest, "Angstrom",
                        "optical", air=True)


def test_air_axis_with_vacuum_rest_value_is_converted():
    v_kms, _ = channel_velocities(_air_halpha_axis())
    assert abs(v_kms[5]) < 1e-6


def test_air_axis_with_line_name_is_converted():
    v_kms, _ = channel_velocities(_air_halpha_axis(None), rest="Halpha")
    assert abs(v_kms[5]) < 1e-6


def test_mixing_air_axis_and_vacuum_rest_would_offset_83_kms():
    # DOMAIN notes: ~82.8 km/s offset at H-alpha (derived) if air is ignored
    axis = _air_halpha_axis()
    wrong = SpectralAxis("WAVE", axis.values, "Angstrom", 6564.608,
                         "Angstrom", "optical", air=False)
    v_kms, _ = channel_velocities(wrong)
    assert v_kms[5] == pytest.approx(-82.8, abs=0.1)


def test_air_rest_value_on_vacuum_axis():
    axis = SpectralAxis("WAVE", 6564.608 + np.array([0.0, 1.0]), "Angstrom")
    v_kms, _ = channel_velocities(axis, rest=6562.795 * u.AA, rest_air=True)
    assert abs(v_kms[0]) < 0.05  # 6562.795 air = 6564.608 vac to 1e-3 A


# --------------------------------------------------------------------------
# faults
# --------------------------------------------------------------------------

def test_missing_rest_frequency_names_the_keyword():
    with pytest.raises(SpectralAxisError, match="RESTFRQ"):
        channel_velocities(_freq_axis([1.0e9, 1.1e9], rest_hz=None))


def test_missing_rest_wavelength_names_the_keyword():
    axis = SpectralAxis("WAVE", [5000.0, 5001.0], "Angstrom")
    with pytest.raises(SpectralAxisError, match="RESTWAV.*choose a line"):
        channel_velocities(axis)


def test_unknown_convention():
    with pytest.raises(SpectralAxisError, match="unknown velocity convention"):
        channel_velocities(_freq_axis([1.0e9, 1.1e9]), convention="nautical")


def test_rest_value_of_wrong_kind():
    with pytest.raises(SpectralAxisError, match="not a frequency or wavelength"):
        channel_velocities(_freq_axis([1.0e9, 1.1e9]), rest=3 * u.kg)
