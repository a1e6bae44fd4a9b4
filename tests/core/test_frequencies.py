"""Orbital frequencies against textbook values, the Milky Way's Oort
constants and galpy."""

import math

import numpy as np
import pytest

from gyrometer.core.frequencies import (frequency_curves, kappa,
                                        kappa_from_oort, lindblad_curve, omega,
                                        oort_constants)
from gyrometer.core.rcmodels import FunctionCurve


def test_kappa_over_omega_for_flat_keplerian_and_solid_body_curves():
    # kappa/Omega = sqrt(2(1 + dlnV/dlnR)): sqrt(2), 1, 2 (Binney & Tremaine
    # 2008 §3.2.3; DOMAIN.md §4 table, derived)
    r = np.array([0.5, 1.0, 3.0, 10.0])
    flat = kappa(np.full_like(r, 200.0), np.zeros_like(r), r) / omega(200.0, r)
    kep_v = 300.0 / np.sqrt(r)
    kep = kappa(kep_v, -0.5 * kep_v / r, r) / omega(kep_v, r)
    solid = kappa(50.0 * r, np.full_like(r, 50.0), r) / omega(50.0 * r, r)
    np.testing.assert_allclose(flat, math.sqrt(2.0), rtol=1e-12)
    np.testing.assert_allclose(kep, 1.0, rtol=1e-12)
    np.testing.assert_allclose(solid, 2.0, rtol=1e-12)


def test_kappa_from_bovy_2017_oort_constants():
    # Bovy (2017, MNRAS 468, L63): A = 15.3, B = -11.9 km/s/kpc ->
    # Omega = A - B = 27.2, kappa = sqrt(-4B(A-B)) = 35.98 km/s/kpc
    a, b = 15.3, -11.9
    assert kappa_from_oort(a, b) == pytest.approx(35.98, abs=0.005)
    # the same local curve expressed as V and dV/dR at R0 = 8 kpc
    # (A - B = V/R, A + B = -dV/dR) gives the same kappa through
    # kappa^2 = (2V/R^2)(V + R dV/dR)
    r0 = 8.0
    v0 = (a - b) * r0
    dvdr = -(a + b)
    assert kappa(v0, dvdr, r0) == pytest.approx(35.98, abs=0.005)
    a2, b2 = oort_constants(v0, dvdr, r0)
    assert (a2, b2) == pytest.approx((a, b), abs=1e-12)
    assert kappa(v0, dvdr, r0) / omega(v0, r0) == pytest.approx(1.323, abs=5e-4)


def test_kappa_is_nan_for_a_curve_falling_faster_than_keplerian():
    r = np.array([1.0, 2.0])
    assert np.all(np.isnan(kappa(100.0 / r**2, -3.0 * 100.0 / r**3, r)))


def test_lindblad_curve_combines_omega_and_kappa_over_m():
    r = np.array([2.0])
    v, dv = np.array([200.0]), np.array([0.0])
    om, ka = 100.0, 100.0 * math.sqrt(2.0)
    assert lindblad_curve(v, dv, r, 2, -1)[0] == pytest.approx(om - ka / 2)
    assert lindblad_curve(v, dv, r, 4, +1)[0] == pytest.approx(om + ka / 4)
    assert lindblad_curve(v, dv, r, 3, 0)[0] == pytest.approx(om)
    with pytest.raises(ValueError):
        lindblad_curve(v, dv, r, 2, 2)


def test_frequency_curves_convert_to_kms_per_kpc_with_a_distance():
    curve = FunctionCurve(lambda r: np.full_like(r, 200.0), (1.0, 100.0),
                          lambda r: np.zeros_like(r))
    r = np.array([10.0, 20.0])
    fc = frequency_curves(curve, r, distance_mpc=20.0, ms=(2, 4))
    # 1 arcsec at 20 Mpc = 0.0969627 kpc (1e3 * 20 / 206264.8)
    assert fc.unit == "km/s/kpc"
    np.testing.assert_allclose(fc.r_kpc, r * 0.0969627362, rtol=1e-9)
    np.testing.assert_allclose(fc.omega, 200.0 / fc.r_kpc, rtol=1e-9)
    np.testing.assert_allclose(fc.lindblad[2][0],
                               fc.omega * (1 - 1 / math.sqrt(2)), rtol=1e-6)
    bare = frequency_curves(curve, r)
    assert bare.unit == "km/s/arcsec" and bare.r_kpc is None


def _galpy_potentials():
    from galpy.potential import (LogarithmicHaloPotential, MiyamotoNagaiPotential,
                                 MWPotential2014, NFWPotential)
    return {
        "logarithmic": LogarithmicHaloPotential(normalize=1.0, q=1.0),
        "miyamoto-nagai": MiyamotoNagaiPotential(a=0.5, b=0.0375, normalize=1.0),
        "nfw": NFWPotential(a=2.0, normalize=1.0),
        "MWPotential2014": MWPotential2014,
    }


@pytest.mark.parametrize("name", ["logarithmic", "miyamoto-nagai", "nfw",
                                  "MWPotential2014"])
def test_omega_and_kappa_agree_with_galpy_to_0p1_percent(name):
    # reference: galpy omegac / epifreq (from the potential's derivatives),
    # natural units ro = 8 kpc, vo = 220 km/s
    import astropy.units as u
    from galpy.potential import epifreq, omegac, vcirc

    pot = _galpy_potentials()[name]
    r_kpc = np.array([0.7, 1.5, 3.0, 6.0, 10.0, 15.0])

    def v_of(r):
        return vcirc(pot, np.atleast_1d(r) * u.kpc, ro=8.0, vo=220.0,
                     quantity=True).to_value(u.km / u.s)

    curve = FunctionCurve(v_of, (0.5, 20.0))
    v = curve.v(r_kpc)
    dv = curve.dvdr(r_kpc)
    ours_om = omega(v, r_kpc)
    ours_ka = kappa(v, dv, r_kpc)
    ref_om = [omegac(pot, x * u.kpc, ro=8.0, vo=220.0, quantity=True)
              .to_value(u.km / u.s / u.kpc) for x in r_kpc]
    ref_ka = [epifreq(pot, x * u.kpc, ro=8.0, vo=220.0, quantity=True)
              .to_value(u.km / u.s / u.kpc) for x in r_kpc]
    np.testing.assert_allclose(ours_om, ref_om, rtol=1e-3)
    np.testing.assert_allclose(ours_ka, ref_ka, rtol=1e-3)
