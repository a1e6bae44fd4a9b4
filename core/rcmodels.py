"""Smooth models of a rotation curve, for derivatives and resonances.

Orbital frequencies need ``dV/dR``; differentiating noisy points amplifies
the noise, so Gyrometer fits smooth forms and differentiates those. Radii are
in arcsec (disk plane) and velocities in km/s throughout; frequencies in
km/s/arcsec are distance-free.

Published forms (R = radius in the disk plane):

* ``"arctan"`` (Courteau 1997, AJ 114, 2402, with V0 = 0 and r0 = 0 for a
  curve centred on the nucleus): ``V = (2/pi) V_c arctan(R / r_t)``.
* ``"polyex"`` (Giovanelli & Haynes 2002, ApJ 571, L107):
  ``V = V_0 (1 - exp(-R/r_PE)) (1 + alpha R / r_PE)``.
* ``"disk+halo"``: exponential disk (Freeman 1970, ApJ 160, 811)
  ``V_d^2 = 4 pi G Sigma_0 h y^2 [I0(y)K0(y) - I1(y)K1(y)]``, ``y = R/2h``,
  parametrised by its peak velocity ``V_d,max`` (reached at R = 2.15 h),
  plus a pseudo-isothermal halo
  ``V_h^2 = V_inf^2 [1 - (r_c/R) arctan(R/r_c)]`` (``V_inf^2 = 4 pi G rho_0
  r_c^2``; standard form, quoted from memory), added in quadrature.
* ``"bertola"`` (Bertola et al. 1991, ApJ 373, 369):
  ``V = A R / (R^2 + c_0^2)^(p/2)``, ``1 <= p <= 3/2``.
* ``"spline"``: a cubic smoothing spline (:class:`scipy.interpolate.
  UnivariateSpline`) with weights ``1/sigma`` and smoothing ``s = N`` (the
  expected chi^2); its number of coefficients counts as its parameters.

Fit quality: chi^2 with the stated errors; ``AIC = chi^2 + 2k`` (Akaike
1974) and ``BIC = chi^2 + k ln N`` (Schwarz 1978), the Gaussian
log-likelihood with known errors up to a constant. Parameter covariances are
scaled by ``max(1, chi^2_red)`` (common practice) so that a poor fit is not
reported with optimistic errors.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Callable, Protocol

import numpy as np
from scipy.interpolate import UnivariateSpline
from scipy.optimize import OptimizeWarning, curve_fit, minimize_scalar
from scipy.special import i0e, i1e, k0e, k1e

from .errors import FitError, RotationCurveError
from .rotation import RotationCurve

__all__ = [
    "SmoothCurve",
    "FunctionCurve",
    "MODEL_NAMES",
    "CurveFit",
    "fit_curve_models",
    "choose_model",
    "fit_table",
    "arctan_curve",
    "polyex_curve",
    "freeman_disk_curve",
    "pseudo_isothermal_curve",
    "disk_halo_curve",
    "bertola_curve",
]


class SmoothCurve(Protocol):
    """What the frequency and resonance code needs from a curve.

    ``v(r_arcsec)`` in km/s, ``dvdr(r_arcsec)`` in km/s/arcsec, and the
    radial range ``r_range_arcsec`` in which the curve is supported by data.
    """

    r_range_arcsec: tuple[float, float]

    def v(self, r_arcsec): ...

    def dvdr(self, r_arcsec): ...


def _central_difference(func: Callable, r) -> np.ndarray:
    """dV/dR of a smooth closed-form model by central differences.

    Step ``h = 1e-5 R`` (relative truncation error ~1e-10 for these forms).
    """
    return _value_and_slope(func, r)[1]


def _value_and_slope(func: Callable, r) -> tuple[np.ndarray, np.ndarray]:
    """``func(r)`` and its central-difference derivative in one call."""
    r = np.asarray(r, dtype=float)
    h = 1e-5 * np.maximum(np.abs(r), 1e-8)
    vals = func(np.concatenate([np.ravel(r), np.ravel(r + h),
                                np.ravel(r - h)]))
    n = r.size
    v, up, down = vals[:n], vals[n:2 * n], vals[2 * n:]
    return (v.reshape(r.shape),
            ((up - down) / (2.0 * np.ravel(h))).reshape(r.shape))


@dataclass(frozen=True, eq=False)
class FunctionCurve:
    """A curve given as functions (any analytic or external model).

    Parameters
    ----------
    v_func : callable
        ``v_func(r_arcsec) -> km/s`` (vectorised).
    r_range_arcsec : tuple of float
        Range where the curve is trusted.
    dvdr_func : callable, optional
        ``dV/dR`` in km/s/arcsec; default: central differences of ``v_func``.
    name : str
    """

    v_func: Callable
    r_range_arcsec: tuple[float, float]
    dvdr_func: Callable | None = None
    name: str = "function"

    def v(self, r_arcsec):
        return np.asarray(self.v_func(np.asarray(r_arcsec, dtype=float)),
                          dtype=float)

    def dvdr(self, r_arcsec):
        if self.dvdr_func is not None:
            return np.asarray(self.dvdr_func(np.asarray(r_arcsec, float)),
                              dtype=float)
        return _central_difference(self.v, r_arcsec)

    def v_dvdr(self, r_arcsec):
        """``(v, dv/dr)`` together (one model evaluation)."""
        if self.dvdr_func is not None:
            return self.v(r_arcsec), self.dvdr(r_arcsec)
        return _value_and_slope(self.v, r_arcsec)


# --------------------------------------------------------------------------
# Model functions (vectorised; parameters broadcast against r)
# --------------------------------------------------------------------------

def arctan_curve(r, v_c, r_t):
    """Courteau (1997) arctan curve, ``(2/pi) V_c arctan(R/r_t)``."""
    return (2.0 / np.pi) * v_c * np.arctan(r / r_t)


def polyex_curve(r, v_0, r_pe, alpha):
    """Giovanelli & Haynes (2002) Polyex curve."""
    x = r / r_pe
    return v_0 * (-np.expm1(-x)) * (1.0 + alpha * x)


def _freeman_shape(y):
    """``y^2 [I0 K0 - I1 K1](y)`` with exponentially scaled Bessel functions
    (``I0(y)K0(y) = i0e(y) k0e(y)``), safe for large y."""
    y = np.asarray(y, dtype=float)
    return y**2 * (i0e(y) * k0e(y) - i1e(y) * k1e(y))


_Y_PEAK = float(minimize_scalar(lambda y: -_freeman_shape(y), bounds=(0.5, 2.0),
                                method="bounded",
                                options={"xatol": 1e-10}).x)
_SHAPE_PEAK = float(_freeman_shape(_Y_PEAK))


def freeman_disk_curve(r, v_max, h):
    """Exponential disk (Freeman 1970) with peak velocity ``v_max``.

    ``V^2 = V_max^2 f(R/2h) / f(y_peak)``, ``f(y) = y^2 [I0K0 - I1K1]``; the
    peak is at ``R = 2 y_peak h = 2.15 h`` (derived; y_peak = 1.0754).
    """
    y = np.maximum(r / (2.0 * h), 1e-12)
    return v_max * np.sqrt(np.clip(_freeman_shape(y), 0, None) / _SHAPE_PEAK)


def pseudo_isothermal_curve(r, v_inf, r_c):
    """Pseudo-isothermal halo, ``V^2 = V_inf^2 [1 - (r_c/R) arctan(R/r_c)]``."""
    x = np.maximum(r / r_c, 1e-12)
    return v_inf * np.sqrt(np.clip(1.0 - np.arctan(x) / x, 0, None))


def disk_halo_curve(r, v_disk, h, v_inf, r_c):
    """Exponential disk plus pseudo-isothermal halo, added in quadrature."""
    return np.sqrt(freeman_disk_curve(r, v_disk, h) ** 2
                   + pseudo_isothermal_curve(r, v_inf, r_c) ** 2)


def bertola_curve(r, a, c_0, p):
    """Bertola et al. (1991): ``A R / (R^2 + c_0^2)^(p/2)``."""
    return a * r / (r**2 + c_0**2) ** (p / 2.0)


@dataclass(frozen=True)
class _Spec:
    name: str
    citation: str
    func: Callable
    param_names: tuple[str, ...]
    guess: Callable  # (r, v) -> p0
    bounds: Callable  # (r, v) -> (lo, hi)


def _vmax(v):
    return max(float(np.max(np.abs(v))), 1.0)


_SPECS = {
    "arctan": _Spec(
        "arctan", "Courteau 1997, AJ 114, 2402", arctan_curve,
        ("v_c_kms", "r_t_arcsec"),
        lambda r, v: [_vmax(v), 0.2 * r.max()],
        lambda r, v: ([0.0, 1e-3 * r.max()], [20 * _vmax(v), 10 * r.max()])),
    "polyex": _Spec(
        "polyex", "Giovanelli & Haynes 2002, ApJ 571, L107", polyex_curve,
        ("v_0_kms", "r_pe_arcsec", "alpha"),
        lambda r, v: [_vmax(v), 0.2 * r.max(), 0.01],
        lambda r, v: ([0.0, 1e-3 * r.max(), -1.0],
                      [20 * _vmax(v), 10 * r.max(), 5.0])),
    "disk+halo": _Spec(
        "disk+halo",
        "exponential disk (Freeman 1970, ApJ 160, 811) + pseudo-isothermal halo",
        disk_halo_curve, ("v_disk_kms", "h_arcsec", "v_inf_kms", "r_c_arcsec"),
        lambda r, v: [0.8 * _vmax(v), 0.2 * r.max(), 0.6 * _vmax(v),
                      0.3 * r.max()],
        lambda r, v: ([0.0, 1e-3 * r.max(), 0.0, 1e-3 * r.max()],
                      [20 * _vmax(v), 10 * r.max(), 20 * _vmax(v),
                       20 * r.max()])),
    "bertola": _Spec(
        "bertola", "Bertola et al. 1991, ApJ 373, 369", bertola_curve,
        ("a", "c_0_arcsec", "p"),
        lambda r, v: [_vmax(v) * r.max() ** 0.1, 0.2 * r.max(), 1.1],
        lambda r, v: ([0.0, 1e-3 * r.max(), 1.0],
                      [np.inf, 10 * r.max(), 1.5])),
}

#: Names understood by :func:`fit_curve_models` and :func:`choose_model`.
MODEL_NAMES = tuple(_SPECS) + ("spline",)


@dataclass(frozen=True, eq=False)
class _ParamCurve:
    """One parameter vector of a closed-form model (a Monte Carlo draw)."""

    spec: _Spec
    params: np.ndarray
    r_range_arcsec: tuple[float, float]

    def v(self, r_arcsec):
        return self.spec.func(np.asarray(r_arcsec, dtype=float), *self.params)

    def dvdr(self, r_arcsec):
        return _central_difference(self.v, r_arcsec)

    def v_dvdr(self, r_arcsec):
        return _value_and_slope(self.v, r_arcsec)


@dataclass(frozen=True, eq=False)
class _SplineCurve:
    spline: UnivariateSpline
    r_range_arcsec: tuple[float, float]

    def v(self, r_arcsec):
        return self.spline(np.asarray(r_arcsec, dtype=float))

    def dvdr(self, r_arcsec):
        return self.spline(np.asarray(r_arcsec, dtype=float), nu=1)

    def v_dvdr(self, r_arcsec):
        return self.v(r_arcsec), self.dvdr(r_arcsec)


def _fit_spline(r, v, e):
    with warnings.catch_warnings():
        # FITPACK warns when s cannot be met exactly; the fit is still valid
        warnings.simplefilter("ignore", UserWarning)
        return UnivariateSpline(r, v, w=1.0 / e, k=3, s=float(r.size))


@dataclass(frozen=True, eq=False)
class CurveFit:
    """One smooth model fitted to a rotation curve.

    Attributes
    ----------
    name : str
        One of :data:`MODEL_NAMES`.
    citation : str
    param_names : tuple of str
    params : numpy.ndarray
        Best-fit parameters (spline: B-spline coefficients).
    cov : numpy.ndarray
        Parameter covariance, scaled by ``max(1, chi^2_red)``.
    chi2 : float
    n_points : int
    n_params : int
    r_range_arcsec : tuple of float
        Radii covered by the fitted points.
    distance_mpc : float or None
    data : RotationCurve
        The points fitted.
    """

    name: str
    citation: str
    param_names: tuple[str, ...]
    params: np.ndarray
    cov: np.ndarray
    chi2: float
    n_points: int
    n_params: int
    r_range_arcsec: tuple[float, float]
    distance_mpc: float | None
    data: RotationCurve
    _curve: object = field(repr=False, default=None)
    _spec: _Spec | None = field(repr=False, default=None)

    @property
    def dof(self) -> int:
        return max(self.n_points - self.n_params, 1)

    @property
    def reduced_chi2(self) -> float:
        return self.chi2 / self.dof

    @property
    def aic(self) -> float:
        """Akaike (1974) information criterion, ``chi^2 + 2k``."""
        return self.chi2 + 2.0 * self.n_params

    @property
    def bic(self) -> float:
        """Schwarz (1978) Bayesian information criterion, ``chi^2 + k ln N``."""
        return self.chi2 + self.n_params * math.log(self.n_points)

    @property
    def param_errors(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.cov), 0, None))

    def v(self, r_arcsec):
        """Model velocity, km/s, at radii in arcsec."""
        return self._curve.v(r_arcsec)

    def dvdr(self, r_arcsec):
        """Model ``dV/dR``, km/s/arcsec (analytic for the spline, central
        differences of the closed form otherwise)."""
        return self._curve.dvdr(r_arcsec)

    def v_dvdr(self, r_arcsec):
        """``(v, dv/dr)`` together (one model evaluation)."""
        return self._curve.v_dvdr(r_arcsec)

    def draw(self, n: int, rng: np.random.Generator) -> list:
        """``n`` curves drawn from the fit's uncertainty.

        Closed forms: parameters from the multivariate normal of ``params``
        and ``cov``, redrawn when outside the model's bounds. Spline: the
        data are perturbed by their errors and the spline refitted
        (parametric bootstrap).
        """
        if n < 1:
            return []
        if self._spec is None:
            d = self.data
            out = []
            for _ in range(n):
                v = d.v_kms + rng.standard_normal(d.v_kms.size) * d.v_err_kms
                out.append(_SplineCurve(_fit_spline(d.r_arcsec, v, d.v_err_kms),
                                        self.r_range_arcsec))
            return out
        r, v = self.data.r_arcsec, self.data.v_kms
        lo, hi = (np.asarray(b, dtype=float) for b in self._spec.bounds(r, v))
        draws = np.empty((0, self.params.size))
        for _ in range(50):
            cand = rng.multivariate_normal(self.params, self.cov, size=2 * n,
                                           method="eigh")
            ok = np.all((cand > lo) & (cand < hi), axis=1)
            draws = np.vstack([draws, cand[ok]])
            if len(draws) >= n:
                break
        if len(draws) < n:  # pathological covariance: clip to the bounds
            extra = rng.multivariate_normal(self.params, self.cov,
                                            size=n - len(draws), method="eigh")
            span = hi - lo
            extra = np.clip(extra, lo + 1e-9 * np.where(np.isfinite(span), span, 1),
                            hi - 1e-9 * np.where(np.isfinite(span), span, 1))
            draws = np.vstack([draws, extra])
        return [_ParamCurve(self._spec, p, self.r_range_arcsec)
                for p in draws[:n]]


def _fit_one(spec: _Spec, curve: RotationCurve, distance_mpc) -> CurveFit:
    r, v, e = curve.r_arcsec, curve.v_kms, curve.v_err_kms
    k = len(spec.param_names)
    if r.size <= k:
        raise FitError(f"{spec.name}: {r.size} points for {k} parameters")
    lo, hi = spec.bounds(r, v)
    p0 = np.clip(spec.guess(r, v), np.asarray(lo) + 1e-6,
                 np.where(np.isfinite(hi), np.asarray(hi) - 1e-6, np.inf))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OptimizeWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        try:
            params, cov = curve_fit(spec.func, r, v, p0=p0, sigma=e,
                                    absolute_sigma=True, bounds=(lo, hi),
                                    maxfev=20000)
        except (RuntimeError, ValueError) as exc:
            raise FitError(f"{spec.name}: {exc}") from exc
    resid = (spec.func(r, *params) - v) / e
    chi2 = float(resid @ resid)
    if not np.all(np.isfinite(cov)):
        raise FitError(f"{spec.name}: parameters not constrained by the data")
    cov = cov * max(1.0, chi2 / max(r.size - k, 1))
    rng_ = (float(r.min()), float(r.max()))
    return CurveFit(spec.name, spec.citation, spec.param_names, params, cov,
                    chi2, int(r.size), k, rng_, distance_mpc, curve,
                    _ParamCurve(spec, params, rng_), spec)


def _fit_spline_model(curve: RotationCurve, distance_mpc) -> CurveFit:
    r, v, e = curve.r_arcsec, curve.v_kms, curve.v_err_kms
    if r.size < 5:
        raise FitError("spline: needs at least 5 points")
    spline = _fit_spline(r, v, e)
    coeffs = spline.get_coeffs()
    chi2 = float(spline.get_residual())
    rng_ = (float(r.min()), float(r.max()))
    return CurveFit("spline",
                    "cubic smoothing spline (scipy UnivariateSpline, s = N)",
                    tuple(f"c{j}" for j in range(coeffs.size)), coeffs,
                    np.full((coeffs.size, coeffs.size), np.nan), chi2,
                    int(r.size), int(coeffs.size), rng_, distance_mpc, curve,
                    _SplineCurve(spline, rng_), None)


def fit_curve_models(curve: RotationCurve, *, models=MODEL_NAMES,
                     use_flagged: bool = False) -> tuple[CurveFit, ...]:
    """Fit smooth models to a rotation curve.

    Parameters
    ----------
    curve : RotationCurve
    models : sequence of str
        Any of :data:`MODEL_NAMES` (default: all).
    use_flagged : bool
        Include points flagged as beam-smeared or inside the bar
        (default False).

    Returns
    -------
    tuple of CurveFit
        Sorted by BIC (best first). Models that fail to converge or have
        too few points are left out.

    Raises
    ------
    RotationCurveError
        Fewer than 3 usable points, an unknown model, or no model converged.
    """
    for name in models:
        if name not in MODEL_NAMES:
            raise RotationCurveError(f"unknown rotation-curve model '{name}'",
                                     keyword="models",
                                     hint=f"choose from {', '.join(MODEL_NAMES)}")
    data = curve
    if not use_flagged and curve.flagged.any():
        if (~curve.flagged).sum() < 3:
            raise RotationCurveError(
                "fewer than 3 unflagged points to fit", path=curve.path,
                hint="fit with use_flagged=True or add points")
        data = curve.unflagged()
    data = data.select(data.r_arcsec > 0)
    fits, problems = [], []
    for name in models:
        try:
            if name == "spline":
                fits.append(_fit_spline_model(data, curve.distance_mpc))
            else:
                fits.append(_fit_one(_SPECS[name], data, curve.distance_mpc))
        except FitError as exc:
            problems.append(str(exc))
    if not fits:
        raise RotationCurveError("no rotation-curve model could be fitted: "
                                 + "; ".join(problems), path=curve.path)
    return tuple(sorted(fits, key=lambda f: f.bic))


def choose_model(fits, criterion: str = "bic") -> CurveFit:
    """Pick a fit: lowest ``"bic"`` or ``"aic"``, or the one named.

    Raises
    ------
    RotationCurveError
        Empty list, or no fit of that name.
    """
    fits = tuple(fits)
    if not fits:
        raise RotationCurveError("no fitted models to choose from")
    if criterion in ("bic", "aic"):
        return min(fits, key=lambda f: getattr(f, criterion))
    for fit in fits:
        if fit.name == criterion:
            return fit
    raise RotationCurveError(
        f"no fitted model named '{criterion}'", keyword="criterion",
        hint=f"fitted: {', '.join(f.name for f in fits)}; or 'bic' / 'aic'")


def fit_table(fits):
    """Fit quality of several models as an :class:`astropy.table.Table`:
    name, number of parameters, chi^2, reduced chi^2, AIC, BIC, delta BIC
    from the best, citation (best BIC first)."""
    from astropy.table import Table

    fits = sorted(fits, key=lambda f: f.bic)
    if not fits:
        raise RotationCurveError("no fitted models to tabulate")
    best = fits[0].bic
    return Table({"model": [f.name for f in fits],
                  "n_params": [f.n_params for f in fits],
                  "n_points": [f.n_points for f in fits],
                  "chi2": [f.chi2 for f in fits],
                  "reduced_chi2": [f.reduced_chi2 for f in fits],
                  "aic": [f.aic for f in fits],
                  "bic": [f.bic for f in fits],
                  "delta_bic": [f.bic - best for f in fits],
                  "citation": [f.citation for f in fits]})
