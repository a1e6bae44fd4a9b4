"""Resonance radii: textbook ratios, a worked example, galpy, Monte Carlo."""

import math

import astropy.units as u
import numpy as np
import pytest
from scipy.stats import norm

from gyrometer.core.errors import RotationCurveError, UnitError
from gyrometer.core.geometry import kpc_per_arcsec
from gyrometer.core.rcmodels import FunctionCurve, fit_curve_models
from gyrometer.core.resonances import (STATUS_FOUND, STATUS_NONE,
                                       STATUS_OUTSIDE, find_resonances,
                                       omega_p_to_kms_arcsec, resonance_budget,
                                       split_normal_draws)
from gyrometer.core.rotation import RotationCurve

KMS_KPC = u.km / u.s / u.kpc
KMS_ARCSEC = u.km / u.s / u.arcsec


def _power_law(beta, v0=200.0, r_range=(0.5, 500.0)):
    return FunctionCurve(lambda r: v0 * (r / 10.0) ** beta, r_range,
                         lambda r: beta * v0 * (r / 10.0) ** beta / r,
                         name=f"power law {beta}")


def _by_name(points):
    return {p.name: p for p in points}


@pytest.mark.parametrize("beta", [0.0, -0.5, 0.3])
def test_power_law_curves_give_the_textbook_resonance_ratios(beta):
    # R_res/R_CR = (1 -+ sqrt(2(1+beta))/m)^(1/(1-beta)) (DOMAIN.md §4,
    # derived); flat: 1 -+ 1/sqrt(2) and 1 -+ sqrt(2)/4, Keplerian:
    # 2^(-2/3), (3/2)^(2/3), (3/4)^(2/3), (5/4)^(2/3)
    # (Binney & Tremaine 2008 §3.3.3)
    curve = _power_law(beta)
    res = _by_name(find_resonances(curve, 8.0 * KMS_ARCSEC))
    cr = res["CR"].radius_arcsec
    k = math.sqrt(2 * (1 + beta))
    expect = {"ILR (outer)": (1 - k / 2) ** (1 / (1 - beta)),
              "OLR": (1 + k / 2) ** (1 / (1 - beta)),
              "UHR inner (4:1)": (1 - k / 4) ** (1 / (1 - beta)),
              "UHR outer (4:1)": (1 + k / 4) ** (1 / (1 - beta))}
    for name, ratio in expect.items():
        assert res[name].status == STATUS_FOUND
        assert res[name].radius_arcsec / cr == pytest.approx(ratio, rel=1e-7)
    if beta == 0.0:
        assert res["ILR (outer)"].radius_arcsec / cr == pytest.approx(0.2929, abs=1e-4)
        assert res["OLR"].radius_arcsec / cr == pytest.approx(1.7071, abs=1e-4)
    if beta == -0.5:
        assert res["ILR (outer)"].radius_arcsec / cr == pytest.approx(0.6300, abs=1e-4)
        assert res["UHR outer (4:1)"].radius_arcsec / cr == pytest.approx(1.1604, abs=1e-4)


def test_solid_body_curve_has_no_lindblad_resonance():
    # Omega - kappa/2 = 0 and Omega + kappa/2 = 2 Omega are constant
    # (DOMAIN.md §4 table)
    curve = FunctionCurve(lambda r: 10.0 * r, (1.0, 50.0),
                          lambda r: np.full_like(r, 10.0))
    res = _by_name(find_resonances(curve, 4.0 * KMS_ARCSEC))
    for name in ("ILR (inner)", "ILR (outer)", "OLR", "CR"):
        assert res[name].status == STATUS_NONE, name
        assert math.isnan(res[name].radius_arcsec)


def test_worked_example_flat_curve_in_kpc():
    # DOMAIN.md §6 worked example (derived): TW slope 3.0 km/s/arcsec,
    # i = 45 deg, D = 20 Mpc -> Omega_p = 43.755 km/s/kpc; V_c = 200 ->
    # R_CR = 4.571 kpc = 47.14 arcsec, ILR 1.339 kpc, OLR 7.803 kpc
    d = 20.0
    omega_p = 3.0 / math.sin(math.radians(45.0)) * KMS_ARCSEC
    assert (omega_p.value / kpc_per_arcsec(d)) == pytest.approx(43.755, abs=5e-4)
    curve = FunctionCurve(lambda r: np.full_like(r, 200.0), (1.0, 150.0),
                          lambda r: np.zeros_like(r))
    res = _by_name(find_resonances(curve, omega_p, distance_mpc=d))
    scale = kpc_per_arcsec(d)
    assert res["CR"].radius_arcsec == pytest.approx(47.14, abs=0.005)
    assert res["CR"].radius_arcsec * scale == pytest.approx(4.571, abs=5e-4)
    assert res["ILR (outer)"].radius_arcsec * scale == pytest.approx(1.339, abs=5e-4)
    assert res["OLR"].radius_arcsec * scale == pytest.approx(7.803, abs=5e-4)
    # the same pattern speed given in km/s/kpc
    res2 = _by_name(find_resonances(curve, 43.755 * KMS_KPC, distance_mpc=d))
    assert res2["CR"].radius_arcsec == pytest.approx(47.14, abs=0.005)


def test_resonance_beyond_the_data_is_reported_not_extrapolated():
    curve = FunctionCurve(lambda r: np.full_like(r, 200.0), (1.0, 30.0),
                          lambda r: np.zeros_like(r))
    res = _by_name(find_resonances(curve, 200.0 / 47.0 * KMS_ARCSEC))
    assert res["CR"].status == STATUS_OUTSIDE
    assert math.isnan(res["CR"].radius_arcsec)
    assert "beyond" in res["CR"].note
    assert res["OLR"].status == STATUS_OUTSIDE
    assert res["ILR (outer)"].status == STATUS_FOUND
    # a flat curve measured only outside 1 arcsec cannot rule out an inner ILR
    assert res["ILR (inner)"].status == STATUS_OUTSIDE
    # and a very fast pattern puts corotation inside the innermost point
    fast = _by_name(find_resonances(curve, 400.0 * KMS_ARCSEC))
    assert fast["CR"].status == STATUS_OUTSIDE
    assert "inside" in fast["CR"].note


def _rising_curve():
    # arctan curve (Courteau 1997) rising to 200 km/s with r_t = 5 arcsec
    return FunctionCurve(lambda r: 200.0 * 2 / np.pi * np.arctan(r / 5.0),
                         (0.05, 200.0))


def test_rising_then_flat_curve_has_two_ilrs_for_a_slow_pattern():
    curve = _rising_curve()
    r = np.geomspace(0.05, 200.0, 20000)
    v, dv = curve.v(r), curve.dvdr(r)
    om = v / r
    peak = np.max(om - np.sqrt(2 * v / r**2 * (v + r * dv)) / 2)
    res = _by_name(find_resonances(curve, 0.5 * peak * KMS_ARCSEC))
    inner, outer = res["ILR (inner)"], res["ILR (outer)"]
    assert inner.status == outer.status == STATUS_FOUND
    assert inner.radius_arcsec < outer.radius_arcsec < res["CR"].radius_arcsec
    # both are roots of Omega - kappa/2 = Omega_p
    for rr in (inner.radius_arcsec, outer.radius_arcsec):
        vv, dd = curve.v(np.array([rr])), curve.dvdr(np.array([rr]))
        f = vv / rr - np.sqrt(2 * vv / rr**2 * (vv + rr * dd)) / 2
        assert f[0] == pytest.approx(0.5 * peak, rel=1e-8)
    # a fast pattern above the peak has none, and we say why
    none = _by_name(find_resonances(curve, 1.2 * peak * KMS_ARCSEC))
    assert none["ILR (inner)"].status == STATUS_NONE
    assert none["ILR (outer)"].status == STATUS_NONE
    assert "peaks" in none["ILR (outer)"].note
    # the table says how many ILRs there are, and in what fraction of draws:
    # Omega_p uniform-ish around the peak gives all three cases
    rng = np.random.default_rng(4)
    table = resonance_budget(curve, 0.5 * peak * KMS_ARCSEC, rng=rng,
                             n_draws=60, vary_curve=False, n_grid=300)
    assert table.ilr_count == 2
    assert table.ilr_count_fractions == (0.0, 0.0, 1.0)
    spread = resonance_budget(curve, peak * KMS_ARCSEC,
                              omega_p_p16=0.8 * peak * KMS_ARCSEC,
                              omega_p_p84=1.2 * peak * KMS_ARCSEC, rng=rng,
                              n_draws=200, vary_curve=False, n_grid=300)
    f0, f1, f2 = spread.ilr_count_fractions
    assert f1 == 0.0  # a tangency has probability zero
    assert f0 == pytest.approx(0.5, abs=0.1) and f2 == pytest.approx(0.5, abs=0.1)
    assert spread.row("ILR (outer)").fraction_found == pytest.approx(f2)


def _galpy_cases():
    from galpy.potential import (LogarithmicHaloPotential,
                                 MiyamotoNagaiPotential, MWPotential2014,
                                 NFWPotential)
    log = LogarithmicHaloPotential(normalize=1.0)
    mn = MiyamotoNagaiPotential(a=0.5, b=0.0375, normalize=1.0)
    nfw = NFWPotential(a=2.0, normalize=1.0)
    # galpy's lindbladR brackets [1e-7, 1000] once, so it only returns an ILR
    # where Omega - kappa/2 has a single root: cuspy potentials (not the
    # cored Miyamoto-Nagai disk)
    return [("logarithmic", log, (2, -2, -4, 4, "corotation")),
            ("nfw", nfw, (2, -2, -4, "corotation")),
            ("MWPotential2014", MWPotential2014, (2, -2, -4, "corotation")),
            ("miyamoto-nagai", mn, (-2, -4, "corotation"))]


@pytest.mark.parametrize("case", range(4))
def test_resonance_radii_agree_with_galpy_lindbladR(case):
    # reference: galpy lindbladR (m(Omega - Omega_p) = kappa, negative m =
    # outer, 'corotation'), ro = 8 kpc, vo = 220 km/s; agreement to 0.1 %
    from galpy.potential import lindbladR, vcirc

    name, pot, orders = _galpy_cases()[case]
    d = 10.0
    scale = kpc_per_arcsec(d)

    def v_of(r_arcsec):
        r_kpc = np.atleast_1d(r_arcsec) * scale
        return vcirc(pot, r_kpc * u.kpc, ro=8.0, vo=220.0,
                     quantity=True).to_value(u.km / u.s)

    curve = FunctionCurve(v_of, (0.01 / scale, 40.0 / scale))
    omega_p = 40.0 * KMS_KPC
    res = _by_name(find_resonances(curve, omega_p, distance_mpc=d, ms=(2, 4),
                                   n_grid=400))
    names = {2: "ILR (outer)", -2: "OLR", -4: "UHR outer (4:1)",
             4: "UHR inner (4:1)", "corotation": "CR"}
    for m in orders:
        ref = lindbladR(pot, omega_p, m=m, ro=8.0, vo=220.0, quantity=True)
        assert ref is not None, (name, m)
        ours = res[names[m]]
        assert ours.status == STATUS_FOUND, (name, m)
        assert ours.radius_arcsec * scale == pytest.approx(
            ref.to_value(u.kpc), rel=1e-3), (name, m)


def test_split_normal_draws_reproduce_the_percentiles():
    rng = np.random.default_rng(3)
    x = split_normal_draws(40.0, 35.0, 50.0, 200_000, rng)
    assert np.percentile(x, [16, 50, 84]) == pytest.approx(
        [35.0, 40.0, 50.0], abs=0.1)


def test_monte_carlo_percentiles_map_through_a_flat_curve():
    # for a flat curve R_CR = V/Omega_p is monotonic, so its 16th/84th
    # percentiles are V/Omega_84 and V/Omega_16 (derived)
    curve = FunctionCurve(lambda r: np.full_like(r, 200.0), (1.0, 500.0),
                          lambda r: np.zeros_like(r))
    rng = np.random.default_rng(7)
    table = resonance_budget(curve, 4.0 * KMS_ARCSEC,
                             omega_p_p16=3.5 * KMS_ARCSEC,
                             omega_p_p84=5.0 * KMS_ARCSEC, rng=rng,
                             n_draws=1000, vary_curve=False, n_grid=200)
    cr = table.row("CR")
    assert cr.radius_arcsec == pytest.approx(50.0, rel=1e-6)
    assert cr.median_arcsec == pytest.approx(50.0, rel=0.02)
    assert cr.p16_arcsec == pytest.approx(200.0 / 5.0, rel=0.03)
    assert cr.p84_arcsec == pytest.approx(200.0 / 3.5, rel=0.03)
    assert cr.fraction_found == 1.0
    olr = table.row("OLR")
    assert olr.median_arcsec == pytest.approx(50.0 * (1 + 1 / math.sqrt(2)), rel=0.02)
    assert table.omega_p_kms_kpc is None


def test_fraction_of_draws_with_corotation_inside_the_data():
    # data end at 60 arcsec: corotation exists only when Omega_p > 200/60;
    # with a normal N(3.5, 0.4) that probability is Phi((3.5 - 3.333)/0.4)
    curve = FunctionCurve(lambda r: np.full_like(r, 200.0), (1.0, 60.0),
                          lambda r: np.zeros_like(r))
    rng = np.random.default_rng(11)
    table = resonance_budget(curve, 3.5 * KMS_ARCSEC,
                             omega_p_p16=3.1 * KMS_ARCSEC,
                             omega_p_p84=3.9 * KMS_ARCSEC, rng=rng,
                             n_draws=1500, vary_curve=False, n_grid=150)
    expect = norm.cdf((3.5 - 200.0 / 60.0) / 0.4)
    cr = table.row("CR")
    assert cr.fraction_found == pytest.approx(expect, abs=0.04)
    assert cr.fraction_outside == pytest.approx(1 - expect, abs=0.04)


def test_budget_propagates_rotation_curve_errors_and_reports_kpc():
    rng = np.random.default_rng(5)
    r = np.linspace(2.0, 80.0, 25)
    v = 200.0 * 2 / np.pi * np.arctan(r / 6.0)
    curve = RotationCurve(r, v + rng.normal(0, 4.0, r.size),
                          np.full(r.size, 4.0), distance_mpc=15.0)
    fit = next(f for f in fit_curve_models(curve, models=("arctan",)))
    draws = rng.normal(45.0, 3.0, 3000) * KMS_KPC
    table = resonance_budget(fit, draws, rng=rng, n_draws=400, n_grid=300)
    cr = table.row("CR")
    fixed = resonance_budget(fit, draws, rng=np.random.default_rng(5),
                             n_draws=400, vary_curve=False, n_grid=300)
    # the curve's uncertainty widens the corotation interval
    assert (cr.p84_arcsec - cr.p16_arcsec) > (fixed.row("CR").p84_arcsec
                                              - fixed.row("CR").p16_arcsec)
    assert cr.median_kpc == pytest.approx(cr.median_arcsec * kpc_per_arcsec(15.0))
    assert table.omega_p_kms_kpc[1] == pytest.approx(45.0, abs=0.5)
    t = table.to_table()
    assert "median_kpc" in t.colnames and len(t) == len(table.rows)
    assert set(table.draws_arcsec) >= {"CR", "OLR", "ILR (inner)"}


def test_pattern_speed_without_unit_or_distance_is_refused():
    with pytest.raises(UnitError):
        omega_p_to_kms_arcsec(40.0, 10.0)
    with pytest.raises(UnitError):
        omega_p_to_kms_arcsec(40.0 * KMS_KPC, None)
    with pytest.raises(UnitError):
        omega_p_to_kms_arcsec(40.0 * u.km / u.s, 10.0)
    curve = FunctionCurve(lambda r: np.full_like(r, 200.0), (1.0, 60.0))
    with pytest.raises(RotationCurveError):
        find_resonances(curve, 4.0 * KMS_ARCSEC, ms=(0,))
    with pytest.raises(RotationCurveError, match="no uncertainty model"):
        resonance_budget(curve, 4.0 * KMS_ARCSEC, rng=np.random.default_rng(),
                         n_draws=5)


def test_any_multiplicity_the_user_asks_for():
    # m = 3 on a flat curve: R/R_CR = 1 -+ sqrt(2)/3 (DOMAIN.md §4 power-law
    # formula with beta = 0, derived)
    res = _by_name(find_resonances(_power_law(0.0), 8.0 * KMS_ARCSEC, ms=(3,)))
    cr = res["CR"].radius_arcsec
    assert res["inner 3:1"].radius_arcsec / cr == pytest.approx(1 - math.sqrt(2) / 3, rel=1e-7)
    assert res["outer 3:1"].radius_arcsec / cr == pytest.approx(1 + math.sqrt(2) / 3, rel=1e-7)
    assert "ILR (outer)" not in res


def test_corotation_of_the_synthetic_barred_galaxy_from_its_velocity_field():
    # whole chain on the generator of core/synthetic.py: tilted rings ->
    # bar zone flagged -> smooth model chosen by BIC -> Monte Carlo; the
    # true corotation radius (Truth.corotation_arcsec) must be recovered
    from gyrometer.core.geometry import DiskGeometry
    from gyrometer.core.rcmodels import choose_model
    from gyrometer.core.rotation import tilted_rings
    from gyrometer.core.synthetic import GalaxyModel, PatternSpec, make_maps

    geom = DiskGeometry(ra_deg=150.0, dec_deg=2.0, pa_deg=250.0, inc_deg=55.0,
                        vsys_kms=3000.0, distance_mpc=20.0)
    bar = PatternSpec("bar", 60.0, 0.5, 0.0, 2.0, angle_deg=60.0)
    model = GalaxyModel("LBDP-011", geom, disk_scale_kpc=1.5, r_turn_kpc=0.5,
                        shape=(96, 96), pixel_scale_arcsec=1.0,
                        wcs_rotation_deg=30.0, center_offset_pix=(2.3, -1.7),
                        psf_fwhm_arcsec=1.5, subsample=2, patterns=(bar,))
    maps, truth = make_maps(model, rng=np.random.default_rng(0))
    curve = tilted_rings(maps, geom, ring_width_arcsec=2.0).curve
    curve = curve.with_flags(curve.flagged
                             | (curve.r_arcsec < truth.zones_arcsec[0][1]),
                             "bar zone")
    fit = choose_model(fit_curve_models(curve), "bic")
    assert 0.5 < fit.reduced_chi2 < 2.0
    table = resonance_budget(fit, 60.0 * KMS_KPC, omega_p_p16=57.0 * KMS_KPC,
                             omega_p_p84=63.0 * KMS_KPC,
                             rng=np.random.default_rng(1), n_draws=200,
                             n_grid=300)
    cr = table.row("CR")
    true_cr = truth.corotation_arcsec[0]
    assert cr.status == STATUS_FOUND
    assert cr.radius_arcsec == pytest.approx(true_cr, rel=0.03)
    assert cr.p16_arcsec < true_cr < cr.p84_arcsec


from hypothesis import given, settings, strategies as st  # noqa: E402


@settings(max_examples=25, deadline=None)
@given(beta=st.floats(-0.5, 0.8), r_cr=st.floats(5.0, 200.0))
def test_power_law_ratios_hold_or_the_resonance_is_reported_outside(beta, r_cr):
    # R_res/R_CR = (1 -+ sqrt(2(1+beta))/m)^(1/(1-beta)) (DOMAIN.md §4,
    # derived); a radius outside the data range must be reported as such
    curve = _power_law(beta, r_range=(1.0, 300.0))
    omega_p = float(curve.v(np.array([r_cr]))[0]) / r_cr
    res = _by_name(find_resonances(curve, omega_p * KMS_ARCSEC, n_grid=400))
    assert res["CR"].radius_arcsec == pytest.approx(r_cr, rel=1e-7)
    k = math.sqrt(2 * (1 + beta))
    for name, m, sign in (("ILR (outer)", 2, -1), ("OLR", 2, 1),
                          ("UHR inner (4:1)", 4, -1), ("UHR outer (4:1)", 4, 1)):
        expect = r_cr * (1 + sign * k / m) ** (1 / (1 - beta))
        if 1.0 * 1.001 < expect < 300.0 / 1.001:
            assert res[name].status == STATUS_FOUND, name
            assert res[name].radius_arcsec == pytest.approx(expect, rel=1e-6)
        elif not 1.0 / 1.001 < expect < 300.0 * 1.001:
            assert res[name].status == STATUS_OUTSIDE, name
