"""Monte Carlo uncertainty budget of Omega_p."""

import numpy as np
import pytest

from gyrometer.core import synthetic as syn
from gyrometer.core.budget import (BudgetSettings, _geometry_chunk, _prepare,
                                   run_budget)
from gyrometer.core.errors import DataContentError
from gyrometer.core.slits import SlitSet, pixel_frame
from gyrometer.core.tw import measure

SLITS = SlitSet.generate(7, 5.0, 4.0, 60.0)


@pytest.fixture(scope="module")
def noisy():
    geo = syn._default_geometry(pa_deg=30.0, inc_deg=50.0, pa_err_deg=2.0,
                                center_err_arcsec=0.5, inc_err_deg=3.0)
    model = syn.barred_model(geometry=geo, bar_radius_kpc=3.0, shape=(64, 64),
                             pixel_scale_arcsec=2.0, noise_frac=0.02,
                             velocity_noise_kms=5.0)
    maps, truth = syn.make_maps(model, rng=np.random.default_rng(11))
    return maps, geo, model


def test_budget_is_seeded_and_reproducible(noisy):
    maps, geo, _ = noisy
    settings = BudgetSettings(n_draws=60, seed=5)
    a = run_budget(maps, geo, SLITS, settings)
    b = run_budget(maps, geo, SLITS, settings)
    c = run_budget(maps, geo, SLITS, BudgetSettings(n_draws=60, seed=6))
    assert np.array_equal(a.draws_kms_arcsec, b.draws_kms_arcsec)
    assert not np.array_equal(a.draws_kms_arcsec, c.draws_kms_arcsec)
    assert [t.name for t in a.terms] == ["noise", "slit bootstrap", "position angle",
                                         "centre", "inclination", "all combined"]
    assert a.seed == 5 and a.distance_mpc == 20.0


def test_terms_are_asymmetric_percentiles_with_shares(noisy):
    maps, geo, _ = noisy
    budget = run_budget(maps, geo, SLITS, BudgetSettings(n_draws=200, seed=1))
    separate = budget.terms[:-1]
    assert sum(t.share for t in separate) == pytest.approx(1.0)
    for t in budget.terms:
        assert t.p16 <= t.median <= t.p84
        assert t.sigma == pytest.approx(0.5 * (t.p84 - t.p16))
    # the combined spread is at least that of its largest part (sampling slack)
    assert budget.combined.sigma >= 0.8 * max(t.sigma for t in separate)


def test_noise_term_matches_the_formal_fit_error(noisy):
    maps, geo, _ = noisy
    m = measure(maps, geo, SLITS, warn=False)
    budget = run_budget(maps, geo, SLITS, BudgetSettings(
        n_draws=400, seed=2, bootstrap=False, position_angle=False, centre=False,
        inclination=False), measurement=m)
    noise = budget.terms[0]
    assert noise.name == "noise"
    # Monte Carlo on the error maps and linear propagation + York errors agree
    assert noise.sigma == pytest.approx(m.omega_p_err_kms_arcsec, rel=0.25)
    assert noise.median == pytest.approx(m.omega_p_kms_arcsec, abs=0.3 * noise.sigma)


def test_inclination_term_follows_one_over_sin_i(noisy):
    maps, geo, _ = noisy
    m = measure(maps, geo, SLITS, warn=False)
    budget = run_budget(maps, geo, SLITS, BudgetSettings(
        n_draws=4000, seed=3, noise=False, bootstrap=False, position_angle=False,
        centre=False), measurement=m)
    inc = budget.terms[0]
    assert inc.name == "inclination"
    # percentiles of slope / sin(i) map from those of i (monotonic; derived)
    lo = m.fit.slope / np.sin(np.radians(50.0 + 3.0))
    hi = m.fit.slope / np.sin(np.radians(50.0 - 3.0))
    assert inc.p16 == pytest.approx(lo, rel=0.01)
    assert inc.p84 == pytest.approx(hi, rel=0.01)


@pytest.mark.parametrize("dpa, de, dn", [(3.0, 0.0, 0.0), (-4.0, 0.0, 0.0),
                                         (0.0, 0.7, -0.4), (1.5, -0.5, 0.9)])
def test_geometry_draw_equals_a_full_remeasurement(noisy, dpa, de, dn):
    maps, geo, _ = noisy
    m = measure(maps, geo, SLITS, warn=False)
    frame = pixel_frame(maps.wcs, maps.shape, geo)
    prep = _prepare(maps, geo, SLITS.slits, m, frame, True)
    slope = _geometry_chunk(prep, np.array([dpa]), np.array([de]), np.array([dn]),
                            np.random.SeedSequence(0), False, False)[0]
    # the same geometry through the public path (centre moved on the sky)
    moved = geo.center.spherical_offsets_by(de * 3600**-1 * geo.center.ra.unit,
                                            dn * 3600**-1 * geo.center.ra.unit)
    geo2 = geo.with_(pa_deg=geo.pa_deg + dpa, ra_deg=float(moved.ra.deg),
                     dec_deg=float(moved.dec.deg))
    ref = measure(maps, geo2, SLITS, warn=False)
    # the remeasurement uses the nominal per-slit errors in the fit, as the
    # budget does, so compare the slopes of the integrals with those errors
    from gyrometer.core.yorkfit import york_fit
    ig = ref.integrals
    expect = york_fit(ig.x_mean_arcsec, ig.v_mean_kms, m.integrals.x_err_arcsec,
                      m.integrals.v_err_kms, m.integrals.xv_corr).slope
    assert slope == pytest.approx(expect, rel=2e-4)


def test_two_workers_give_the_same_draws(noisy):
    maps, geo, _ = noisy
    s1 = BudgetSettings(n_draws=40, seed=8, chunk=10, workers=1)
    s2 = BudgetSettings(n_draws=40, seed=8, chunk=10, workers=2)
    a = run_budget(maps, geo, SLITS, s1)
    b = run_budget(maps, geo, SLITS, s2)
    assert np.array_equal(a.draws_kms_arcsec, b.draws_kms_arcsec)


def test_bad_settings_raise():
    with pytest.raises(DataContentError):
        BudgetSettings(n_draws=3)
    with pytest.raises(DataContentError):
        BudgetSettings(pa_err_deg=-1.0)


def test_grid_interpolation_matches_exact_geometry_draws(noisy):
    maps, geo, _ = noisy
    m = measure(maps, geo, SLITS, warn=False)
    common = dict(n_draws=150, seed=4, noise=False, bootstrap=False, inclination=False)
    fast = run_budget(maps, geo, SLITS, BudgetSettings(**common), measurement=m)
    exact = run_budget(maps, geo, SLITS, BudgetSettings(exact=True, **common),
                       measurement=m)
    for a, b in zip(fast.terms, exact.terms):
        assert a.name == b.name
        # same draws of PA and centre: the spline through exact grid values
        # reproduces the per-draw exact weights to a small part of the spread
        for q in ("p16", "median", "p84"):
            assert getattr(a, q) == pytest.approx(getattr(b, q), abs=0.03 * b.sigma + 1e-9)


def test_gaussian_slit_sums_match_per_pixel_noise(noisy):
    maps, geo, _ = noisy
    m = measure(maps, geo, SLITS, warn=False)
    only_noise = dict(n_draws=400, seed=6, bootstrap=False, position_angle=False,
                      centre=False, inclination=False)
    fast = run_budget(maps, geo, SLITS, BudgetSettings(**only_noise), measurement=m)
    exact = run_budget(maps, geo, SLITS, BudgetSettings(exact=True, **only_noise),
                       measurement=m)
    # independent random streams: agreement within sampling error (~7 %)
    assert fast.terms[0].sigma == pytest.approx(exact.terms[0].sigma, rel=0.2)
    assert fast.terms[0].median == pytest.approx(exact.terms[0].median,
                                                 abs=0.2 * exact.terms[0].sigma)
