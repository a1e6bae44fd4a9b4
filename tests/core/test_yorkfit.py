"""York et al. (2004) straight-line fit with errors on both axes."""

import warnings

import numpy as np
import pytest

from gyrometer.core.errors import FitError
from gyrometer.core.yorkfit import york_fit, york_slopes

# Pearson (1901) data with York (1966) weights, as tabulated by York et al.
# (2004, Am. J. Phys. 72, 367); the x values and weights match the copy in
# Lybanon (1984, Am. J. Phys. 52, 22).
PEARSON_X = np.array([0.0, 0.9, 1.8, 2.6, 3.3, 4.4, 5.2, 6.1, 6.5, 7.4])
PEARSON_Y = np.array([5.9, 5.4, 4.4, 4.6, 3.5, 3.7, 2.8, 2.8, 2.4, 1.5])
PEARSON_WX = np.array([1000, 1000, 500, 800, 200, 80, 60, 20, 1.8, 1.0])
PEARSON_WY = np.array([1, 1.8, 4, 8, 20, 20, 70, 70, 100, 500.0])


def test_pearson_york_benchmark_slope_and_intercept():
    fit = york_fit(PEARSON_X, PEARSON_Y, 1 / np.sqrt(PEARSON_WX), 1 / np.sqrt(PEARSON_WY))
    # b = -0.4805, a = 5.4799: York et al. (2004) / Cantrell (2008, Atmos.
    # Chem. Phys. 8, 5477) benchmark values (from memory).
    assert fit.slope == pytest.approx(-0.4805, abs=6e-5)
    assert fit.intercept == pytest.approx(5.4799, abs=6e-5)
    assert fit.dof == 8


def test_pearson_york_benchmark_errors_scaled_by_goodness_of_fit():
    fit = york_fit(PEARSON_X, PEARSON_Y, 1 / np.sqrt(PEARSON_WX), 1 / np.sqrt(PEARSON_WY))
    scale = np.sqrt(fit.chi2 / fit.dof)
    # sigma_b = 0.0706, sigma_a = 0.359 are the widely quoted values
    # (York et al. 2004 table / Cantrell 2008; from memory); they include the
    # factor sqrt(S / (n - 2)). Our LineFit keeps the unscaled errors.
    assert fit.slope_err * scale == pytest.approx(0.0706, abs=2e-4)
    assert fit.intercept_err * scale == pytest.approx(0.359, abs=1.5e-3)


def test_matches_scipy_odr_on_random_data():
    rng = np.random.default_rng(7)
    n = 25
    x_true = np.linspace(-10, 10, n)
    sx = rng.uniform(0.2, 1.0, n)
    sy = rng.uniform(0.5, 2.0, n)
    x = x_true + rng.normal(0, sx)
    y = 1.7 * x_true - 3.0 + rng.normal(0, sy)
    fit = york_fit(x, y, sx, sy)
    # scipy.odr is deprecated in SciPy 1.17 (removed in 1.19); it is only the
    # reference implementation here, so its DeprecationWarning is silenced
    # for this import and use only.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        from scipy import odr
        model = odr.Model(lambda beta, xx: beta[0] * xx + beta[1])
        out = odr.ODR(odr.RealData(x, y, sx=sx, sy=sy), model,
                      beta0=[1.0, 0.0]).run()
    assert fit.slope == pytest.approx(out.beta[0], rel=1e-6)
    assert fit.intercept == pytest.approx(out.beta[1], rel=1e-6, abs=1e-6)
    # ODRPACK's sd_beta is scaled by the residual variance; compare unscaled.
    assert fit.slope_err == pytest.approx(np.sqrt(out.cov_beta[0, 0]), rel=2e-2)


def test_reduces_to_weighted_least_squares_without_x_errors():
    rng = np.random.default_rng(3)
    x = np.linspace(0, 5, 12)
    sy = rng.uniform(0.1, 0.5, 12)
    y = 2.0 * x + 1.0 + rng.normal(0, sy)
    fit = york_fit(x, y, np.zeros_like(x), sy)
    coef, cov = np.polyfit(x, y, 1, w=1 / sy, cov="unscaled")
    assert fit.slope == pytest.approx(coef[0], rel=1e-10)
    assert fit.intercept == pytest.approx(coef[1], rel=1e-10)
    assert fit.slope_err == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-8)


def test_swapping_axes_inverts_slope_with_correlated_errors():
    rng = np.random.default_rng(11)
    x = np.linspace(-3, 3, 9) + rng.normal(0, 0.1, 9)
    y = 0.8 * x + rng.normal(0, 0.1, 9)
    sx = np.full(9, 0.1)
    sy = np.full(9, 0.15)
    r = np.full(9, 0.4)
    a = york_fit(x, y, sx, sy, r)
    b = york_fit(y, x, sy, sx, r)
    # The York solution is symmetric in x and y (York et al. 2004, sec. II).
    assert b.slope == pytest.approx(1 / a.slope, rel=1e-9)


def test_vectorised_slopes_match_single_fits():
    rng = np.random.default_rng(5)
    x = rng.normal(size=(4, 8))
    y = 0.5 * x + rng.normal(0, 0.1, (4, 8))
    s = york_slopes(x, y, 0.1, 0.1)
    for k in range(4):
        assert s[k] == pytest.approx(york_fit(x[k], y[k], np.full(8, .1), np.full(8, .1)).slope)


@pytest.mark.parametrize("x, y, sx, sy", [
    ([1.0], [1.0], [0.1], [0.1]),
    ([1.0, 1.0, 1.0], [1.0, 2.0, 3.0], [0.1] * 3, [0.1] * 3),
    ([1.0, 2.0], [1.0, np.nan], [0.1] * 2, [0.1] * 2),
    ([1.0, 2.0], [1.0, 2.0], [0.0, 0.0], [0.0, 0.0]),
])
def test_degenerate_input_raises_fit_error(x, y, sx, sy):
    with pytest.raises(FitError):
        york_fit(x, y, sx, sy)
