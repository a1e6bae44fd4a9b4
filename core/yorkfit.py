"""Straight-line fit with errors on both axes (York et al. 2004).

The Tremaine-Weinberg slope is fitted to per-slit points ``(<X>, <V>)``
whose errors are of comparable importance on both axes and correlated
(both integrals are weighted by the same surface brightness). We use the
"unified equations" of York, Evensen, Martinez & De Basabe Delgado (2004,
Am. J. Phys. 72, 367), which handle a correlation coefficient ``r_i`` per
point and give the standard errors of slope and intercept. With ``r = 0``
they reduce to York (1966); with ``sx -> 0`` to weighted least squares.
"""

from __future__ import annotations

import numpy as np

from .errors import FitError
from .results import LineFit

__all__ = ["york_fit", "york_slopes", "YORK_METHOD"]

#: Name and citation stored in :attr:`LineFit.method`.
YORK_METHOD = "York et al. (2004, Am. J. Phys. 72, 367) unified regression"


def _york_core(x, y, sx, sy, r, *, max_iter: int = 100, rtol: float = 1e-12):
    """Vectorised York et al. (2004) iteration over leading axes.

    Arrays of shape ``(..., n)``. Returns ``slope, intercept, slope_err,
    intercept_err, cov, chi2`` with shape ``(...)``; NaN where a fit is
    degenerate.

    Notes
    -----
    Steps of York et al. (2004, section III) written with variances, so that
    a zero error on one axis is allowed:
    ``W_i = 1 / (sy^2 + b^2 sx^2 - 2 b r sx sy)``;
    ``beta_i = W_i [U_i sy^2 + b V_i sx^2 - (b U_i + V_i) r sx sy]``;
    ``b = sum W beta V / sum W beta U``; ``a = Ybar - b Xbar``;
    ``sigma_b^2 = 1 / sum W u^2``, ``sigma_a^2 = 1 / sum W + xbar^2 sigma_b^2``
    with ``u_i = Xbar + beta_i - xbar``; ``cov(a, b) = -xbar sigma_b^2``.
    """
    x, y, sx, sy, r = np.broadcast_arrays(*(np.asarray(a, dtype=float)
                                            for a in (x, y, sx, sy, r)))
    vx, vy, cxy = sx * sx, sy * sy, r * sx * sy
    # Start from ordinary least squares.
    xm = x.mean(axis=-1, keepdims=True)
    ym = y.mean(axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        b = (((x - xm) * (y - ym)).sum(-1) / ((x - xm) ** 2).sum(-1))[..., None]
        for _ in range(max_iter):
            w = 1.0 / (vy + b * b * vx - 2.0 * b * cxy)
            sw = w.sum(-1, keepdims=True)
            xbar = (w * x).sum(-1, keepdims=True) / sw
            ybar = (w * y).sum(-1, keepdims=True) / sw
            u_, v_ = x - xbar, y - ybar
            beta = w * (u_ * vy + b * v_ * vx - (b * u_ + v_) * cxy)
            b_new = (w * beta * v_).sum(-1, keepdims=True) / \
                (w * beta * u_).sum(-1, keepdims=True)
            done = np.all(~(np.abs(b_new - b) > rtol * np.abs(b_new)))
            b = b_new
            if done:
                break
        w = 1.0 / (vy + b * b * vx - 2.0 * b * cxy)
        sw = w.sum(-1, keepdims=True)
        xbar = (w * x).sum(-1, keepdims=True) / sw
        ybar = (w * y).sum(-1, keepdims=True) / sw
        u_, v_ = x - xbar, y - ybar
        beta = w * (u_ * vy + b * v_ * vx - (b * u_ + v_) * cxy)
        a = ybar - b * xbar
        xfit = xbar + beta
        xfit_bar = (w * xfit).sum(-1, keepdims=True) / sw
        uu = xfit - xfit_bar
        var_b = 1.0 / (w * uu * uu).sum(-1, keepdims=True)
        var_a = 1.0 / sw + xfit_bar ** 2 * var_b
        cov = -xfit_bar * var_b
        chi2 = (w * (y - b * x - a) ** 2).sum(-1, keepdims=True)
    out = (b, a, np.sqrt(var_b), np.sqrt(var_a), cov, chi2)
    return tuple(o[..., 0] for o in out)


def york_slopes(x, y, sx, sy, r=None) -> np.ndarray:
    """Slopes only, vectorised over leading axes (for Monte Carlo draws)."""
    r = 0.0 if r is None else r
    return _york_core(x, y, sx, sy, r)[0]


def york_fit(x, y, sx, sy, r=None) -> LineFit:
    """Best straight line ``y = slope x + intercept`` with errors on both axes.

    Parameters
    ----------
    x, y : array_like, shape (n,)
        Data points.
    sx, sy : array_like, shape (n,)
        1-sigma errors (either may be zero for some or all points, not both
        for every point).
    r : array_like, optional
        Correlation coefficients of the errors of ``x_i`` and ``y_i``.

    Returns
    -------
    LineFit
        Slope, intercept, their standard errors and covariance (York et al.
        2004, eqs. 13-15 in their notation), ``chi2 = sum W_i (y_i - b x_i -
        a)^2`` and ``dof = n - 2``.

    Raises
    ------
    FitError
        Fewer than two points, non-finite input, or a degenerate set (all
        ``x`` equal, or every point with zero errors on both axes).
    """
    x, y, sx, sy = (np.atleast_1d(np.asarray(a, dtype=float)) for a in (x, y, sx, sy))
    r = np.zeros_like(x) if r is None else np.broadcast_to(np.asarray(r, float), x.shape)
    n = x.size
    if n < 2:
        raise FitError("a line fit needs at least two points", value=n)
    for name, arr in (("x", x), ("y", y), ("sx", sx), ("sy", sy), ("r", r)):
        if arr.shape != x.shape or not np.all(np.isfinite(arr)):
            raise FitError(f"{name} must be finite and of the same length as x",
                           keyword=name)
    if np.any(sx < 0) or np.any(sy < 0) or np.any(np.abs(r) > 1):
        raise FitError("errors must be >= 0 and |r| <= 1", keyword="sx/sy/r")
    if np.all((sx == 0) & (sy == 0)) or np.any((sx == 0) & (sy == 0)):
        raise FitError("every point needs a positive error on at least one axis",
                       keyword="sx/sy",
                       hint="supply error maps, or use a fit without weights")
    if np.ptp(x) == 0:
        raise FitError("all x values are equal: the slope is undefined", keyword="x")
    b, a, sb, sa, cov, chi2 = _york_core(x, y, sx, sy, r)
    if not np.isfinite(b) or not np.isfinite(sb):
        raise FitError("the York regression did not converge", keyword="x/y")
    return LineFit(float(b), float(a), float(sb), float(sa), float(cov),
                   float(chi2), n - 2, YORK_METHOD)
