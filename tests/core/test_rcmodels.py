"""Smooth rotation-curve models: published forms, fits and draws."""

import math

import numpy as np
import pytest
from scipy.special import i0, i1, k0, k1

from gyrometer.core.errors import RotationCurveError
from gyrometer.core.rcmodels import (MODEL_NAMES, arctan_curve, bertola_curve,
                                     choose_model, disk_halo_curve, fit_table,
                                     fit_curve_models, freeman_disk_curve,
                                     polyex_curve, pseudo_isothermal_curve)
from gyrometer.core.rotation import RotationCurve


def test_freeman_disk_peaks_at_2p15_scale_lengths_with_0p6221_sqrt_gm_over_h():
    # Freeman (1970): V^2 = 4 pi G Sigma0 h y^2 [I0K0 - I1K1], y = R/2h;
    # with M = 2 pi Sigma0 h^2: V^2 / (GM/h) = 2 y^2 [I0K0 - I1K1]; peak at
    # R = 2.150 h with V_max = 0.6221 sqrt(GM/h) (DOMAIN.md §6, derived)
    h = 3.0
    r = np.linspace(0.05, 20.0, 200001)
    y = r / (2 * h)
    ref = np.sqrt(2 * y**2 * (i0(y) * k0(y) - i1(y) * k1(y)))  # sqrt(GM/h) = 1
    assert ref.max() == pytest.approx(0.6221, abs=1e-4)
    assert r[np.argmax(ref)] / h == pytest.approx(2.150, abs=2e-3)
    ours = freeman_disk_curve(r, ref.max(), h)
    np.testing.assert_allclose(ours, ref, rtol=1e-6)


def test_closed_forms_match_their_published_expressions():
    r = np.array([0.5, 2.0, 10.0, 40.0])
    # Courteau (1997): (2/pi) V_c arctan(R/r_t)
    np.testing.assert_allclose(arctan_curve(r, 180.0, 4.0),
                               2 / np.pi * 180 * np.arctan(r / 4.0))
    # Giovanelli & Haynes (2002): V0 (1 - e^(-r/rPE)) (1 + a r/rPE)
    np.testing.assert_allclose(polyex_curve(r, 150.0, 5.0, 0.03),
                               150 * (1 - np.exp(-r / 5)) * (1 + 0.03 * r / 5))
    # Bertola et al. (1991): A r / (r^2 + c0^2)^(p/2); p = 1 tends to A
    np.testing.assert_allclose(bertola_curve(r, 200.0, 3.0, 1.0),
                               200 * r / np.sqrt(r**2 + 9.0))
    # pseudo-isothermal halo tends to V_inf at large radius, rises as R at
    # small radius with V^2 ~ V_inf^2 R^2 / (3 r_c^2) (series of arctan)
    assert pseudo_isothermal_curve(np.array([1e4]), 150.0, 2.0)[0] == pytest.approx(
        150.0, rel=2e-4)
    small = pseudo_isothermal_curve(np.array([1e-3]), 150.0, 2.0)[0]
    assert small == pytest.approx(150.0 * 1e-3 / (2.0 * math.sqrt(3)), rel=1e-5)
    both = disk_halo_curve(r, 120.0, 3.0, 150.0, 5.0)
    np.testing.assert_allclose(both**2, freeman_disk_curve(r, 120.0, 3.0) ** 2
                               + pseudo_isothermal_curve(r, 150.0, 5.0) ** 2)


def _arctan_data(seed=1, n=30, err=3.0):
    rng = np.random.default_rng(seed)
    r = np.linspace(1.0, 90.0, n)
    v = arctan_curve(r, 210.0, 7.0) + rng.normal(0.0, err, n)
    return RotationCurve(r, v, np.full(n, err), distance_mpc=12.0)


def test_arctan_fit_recovers_its_parameters_within_errors():
    fits = fit_curve_models(_arctan_data(), models=("arctan",))
    fit = fits[0]
    assert fit.name == "arctan"
    (vc, rt), (e_vc, e_rt) = fit.params, fit.param_errors
    assert abs(vc - 210.0) < 3 * e_vc
    assert abs(rt - 7.0) < 3 * e_rt
    assert 0.4 < fit.reduced_chi2 < 2.0
    assert fit.bic == pytest.approx(fit.chi2 + 2 * math.log(30))
    assert fit.aic == pytest.approx(fit.chi2 + 4)


def test_all_models_fit_and_are_ranked_by_bic():
    fits = fit_curve_models(_arctan_data(seed=2))
    assert {f.name for f in fits} == set(MODEL_NAMES)
    bics = [f.bic for f in fits]
    assert bics == sorted(bics)
    assert choose_model(fits, "bic") is fits[0]
    assert choose_model(fits, "aic").aic == min(f.aic for f in fits)
    assert choose_model(fits, "polyex").name == "polyex"
    # data drawn from an arctan curve: the arctan model is within 2 of the
    # best BIC (it has the fewest parameters of the forms that fit)
    arctan = choose_model(fits, "arctan")
    assert arctan.bic - fits[0].bic < 2.0
    with pytest.raises(RotationCurveError, match="no fitted model named"):
        choose_model(fits, "nfw")
    table = fit_table(fits)
    assert list(table["model"]) == [f.name for f in fits]
    assert table["delta_bic"][0] == 0.0 and np.all(table["delta_bic"] >= 0)


def test_model_derivative_matches_the_analytic_arctan_derivative():
    fit = fit_curve_models(_arctan_data(), models=("arctan",))[0]
    vc, rt = fit.params
    r = np.array([2.0, 10.0, 50.0])
    analytic = 2 / np.pi * vc * rt / (rt**2 + r**2)
    np.testing.assert_allclose(fit.dvdr(r), analytic, rtol=1e-7)


def test_spline_derivative_follows_a_smooth_curve():
    r = np.linspace(1.0, 90.0, 60)
    v = arctan_curve(r, 200.0, 10.0)
    curve = RotationCurve(r, v, np.full(r.size, 0.5))
    spline = choose_model(fit_curve_models(curve, models=("spline",)), "spline")
    rr = np.array([15.0, 30.0, 60.0])
    true = 2 / np.pi * 200.0 * 10.0 / (100.0 + rr**2)
    # a smoothing spline may deviate by ~ the errors (s = N), so its slope is
    # good to ~10 %, not to machine precision
    np.testing.assert_allclose(spline.dvdr(rr), true, rtol=0.12)
    np.testing.assert_allclose(spline.v(rr), arctan_curve(rr, 200.0, 10.0),
                               atol=1.0)  # two sigma of the points


def test_parameter_draws_follow_the_covariance():
    fit = fit_curve_models(_arctan_data(), models=("arctan",))[0]
    rng = np.random.default_rng(0)
    draws = np.array([c.params for c in fit.draw(4000, rng)])
    np.testing.assert_allclose(draws.mean(axis=0), fit.params,
                               atol=0.1 * np.sqrt(np.diag(fit.cov)).max())
    np.testing.assert_allclose(np.cov(draws.T), fit.cov, rtol=0.1)
    spline = fit_curve_models(_arctan_data(), models=("spline",))[0]
    curves = spline.draw(20, rng)
    spread = np.std([c.v(np.array([40.0]))[0] for c in curves])
    assert 0.1 < spread < 5.0


def test_flagged_points_are_left_out_unless_asked():
    data = _arctan_data()
    flags = data.r_arcsec < 10.0
    flagged = data.with_flags(flags, "beam smearing")
    fit = fit_curve_models(flagged, models=("arctan",))[0]
    assert fit.n_points == int((~flags).sum())
    assert fit.r_range_arcsec[0] >= 10.0
    fit_all = fit_curve_models(flagged, models=("arctan",), use_flagged=True)[0]
    assert fit_all.n_points == data.r_arcsec.size


def test_unknown_model_and_too_few_points_are_refused():
    with pytest.raises(RotationCurveError, match="unknown rotation-curve model"):
        fit_curve_models(_arctan_data(), models=("nfw",))
    tiny = RotationCurve([1.0, 2.0, 3.0], [50.0, 90.0, 120.0], [5.0, 5.0, 5.0],
                         path="tiny.ecsv")
    with pytest.raises(RotationCurveError, match="tiny.ecsv"):
        fit_curve_models(tiny, models=("disk+halo", "spline"))
