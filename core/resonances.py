"""Resonance radii of a rotating pattern, with Monte Carlo uncertainties.

A pattern of speed ``Omega_p`` with m-fold symmetry resonates with the disk
where ``m (Omega - Omega_p) = l kappa`` (Binney & Tremaine 2008, §3.3.3):
corotation (l = 0, ``Omega = Omega_p``), the inner and outer Lindblad
resonances (m = 2, l = -+1: ``Omega -+ kappa/2 = Omega_p``) and the inner and
outer 4:1 (ultraharmonic) resonances of a bar (``Omega -+ kappa/4 =
Omega_p``); any other m can be asked for.

Every crossing is found by evaluating ``f(R) = Omega + l kappa/m - Omega_p``
on a fine logarithmic grid over the whole radial range, locating every sign
change and refining each with :func:`scipy.optimize.brentq`. Curves that
rise and then flatten make ``Omega - kappa/2`` peak, so there may be no ILR
or two: the inner one is where ``f`` crosses zero upward (increasing
outward), the outer one where it crosses downward.

Nothing is extrapolated: a resonance that would lie beyond the outermost or
inside the innermost radius of the curve is reported with status
``"outside data range"``; ``"none"`` means the curve inside the data range
gives no reason to expect one (e.g. ``Omega - kappa/2`` peaks below
``Omega_p``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np
from scipy.optimize import brentq

from .errors import RotationCurveError, UnitError
from .frequencies import kappa, omega
from .geometry import kpc_per_arcsec
from .progress import CancelFlag, ProgressCallback, check_cancel, report

__all__ = [
    "STATUS_FOUND",
    "STATUS_NONE",
    "STATUS_OUTSIDE",
    "ResonancePoint",
    "ResonanceRow",
    "ResonanceTable",
    "find_resonances",
    "resonance_budget",
    "split_normal_draws",
    "omega_p_to_kms_arcsec",
]

STATUS_FOUND = "found"
STATUS_NONE = "none"
STATUS_OUTSIDE = "outside data range"

_KMS_KPC = u.km / u.s / u.kpc
_KMS_ARCSEC = u.km / u.s / u.arcsec


def omega_p_to_kms_arcsec(omega_p, distance_mpc: float | None) -> np.ndarray:
    """Pattern speed(s) as plain km/s/arcsec.

    ``omega_p`` must be a Quantity in km/s/arcsec (distance-free, as the
    Tremaine-Weinberg slope gives it) or in km/s/kpc (then the distance is
    needed: ``Omega[km/s/arcsec] = Omega[km/s/kpc] * kpc_per_arcsec(D)``).
    """
    if not isinstance(omega_p, u.Quantity):
        raise UnitError("the pattern speed needs a unit (km/s/kpc or "
                        "km/s/arcsec)", keyword="omega_p", value=omega_p,
                        hint="multiply by u.km / u.s / u.kpc")
    try:
        return np.asarray(omega_p.to_value(_KMS_ARCSEC), dtype=float)
    except u.UnitConversionError:
        pass
    try:
        value = omega_p.to_value(_KMS_KPC)
    except u.UnitConversionError as exc:
        raise UnitError(f"the pattern speed has unit {omega_p.unit}, not "
                        "km/s/kpc or km/s/arcsec", keyword="omega_p") from exc
    if distance_mpc is None:
        raise UnitError("a pattern speed in km/s/kpc needs the distance to be "
                        "compared with a curve in arcsec",
                        keyword="distance_mpc", hint="give distance_mpc")
    return np.asarray(value * kpc_per_arcsec(distance_mpc), dtype=float)


def split_normal_draws(median: float, p16: float, p84: float, n: int,
                       rng: np.random.Generator) -> np.ndarray:
    """Draws from a split normal with the given median and 16th/84th
    percentiles (sigma_low = median - p16 below, sigma_high = p84 - median
    above); reproduces the three percentiles exactly."""
    if not p16 <= median <= p84:
        raise ValueError("need p16 <= median <= p84")
    z = rng.standard_normal(n)
    return median + np.where(z < 0, (median - p16) * z, (p84 - median) * z)


# --------------------------------------------------------------------------
# Point estimate for one curve and one pattern speed
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class _Kind:
    name: str
    m: int
    sign: int            # -1 inner, 0 corotation, +1 outer
    rising: bool         # True: root where f increases outward


def _kinds(ms) -> list[_Kind]:
    kinds = [_Kind("CR", 2, 0, False)]
    for m in ms:
        m = int(m)
        if m < 1:
            raise RotationCurveError("pattern multiplicity m must be >= 1",
                                     keyword="m", value=m)
        if m == 2:
            kinds += [_Kind("ILR (inner)", 2, -1, True),
                      _Kind("ILR (outer)", 2, -1, False),
                      _Kind("OLR", 2, 1, False)]
        elif m == 4:
            kinds += [_Kind("UHR inner (4:1)", 4, -1, False),
                      _Kind("UHR outer (4:1)", 4, 1, False)]
        else:
            kinds += [_Kind(f"inner {m}:1", m, -1, False),
                      _Kind(f"outer {m}:1", m, 1, False)]
    return kinds


@dataclass(frozen=True)
class ResonancePoint:
    """One resonance for one curve and one pattern speed.

    Attributes
    ----------
    name : str
        ``"CR"``, ``"ILR (inner)"``, ``"ILR (outer)"``, ``"OLR"``,
        ``"UHR inner (4:1)"``, ``"UHR outer (4:1)"``, ``"inner m:1"`` ...
    m : int
    status : str
        ``"found"``, ``"none"`` or ``"outside data range"``.
    radius_arcsec : float
        NaN unless found.
    all_radii_arcsec : tuple of float
        Every crossing of this kind (more than one for bumpy curves; the
        first is reported).
    note : str
    """

    name: str
    m: int
    status: str
    radius_arcsec: float
    all_radii_arcsec: tuple[float, ...] = ()
    note: str = ""


def _grid(r_lo: float, r_hi: float, n: int) -> np.ndarray:
    r_lo = max(r_lo, 1e-4 * r_hi)
    return np.geomspace(r_lo, r_hi, n)


def _point(curve, om_p: float, kinds, r_lo: float, r_hi: float,
           n_grid: int) -> list[ResonancePoint]:
    grid = _grid(r_lo, r_hi, n_grid)
    both = getattr(curve, "v_dvdr", None)
    if both is None:
        def both(r):
            return curve.v(r), curve.dvdr(r)
    v, dv = (np.asarray(a, dtype=float) for a in both(grid))
    om = omega(v, grid)
    ka = kappa(v, dv, grid)
    finite_om = np.abs(om[np.isfinite(om)])
    scale = max(abs(om_p), float(finite_om.max()) if finite_om.size else 0.0,
                1e-30)
    out = []
    for kind in kinds:
        def f_scalar(r, kind=kind):
            rr = np.array([r])
            if kind.sign:
                vv, dd = (float(a[0]) for a in both(rr))
                k2 = 2.0 * vv / r**2 * (vv + r * dd)
                return (vv / r + kind.sign * math.sqrt(max(k2, 0.0)) / kind.m
                        - om_p)
            return float(curve.v(rr)[0]) / r - om_p

        f = om - om_p if kind.sign == 0 else om + kind.sign * ka / kind.m - om_p
        finite = np.isfinite(f)
        if finite.sum() < 2:
            out.append(ResonancePoint(kind.name, kind.m, STATUS_NONE, math.nan,
                                      (), "frequencies not finite"))
            continue
        roots = []
        for i in np.nonzero(finite[:-1] & finite[1:]
                            & (np.sign(f[:-1]) != np.sign(f[1:])))[0]:
            rising = f[i + 1] > f[i]
            if rising != kind.rising:
                continue
            if f[i] == 0.0:
                roots.append(float(grid[i]))
                continue
            try:
                roots.append(float(brentq(f_scalar, grid[i], grid[i + 1],
                                          xtol=1e-12 * grid[i], rtol=1e-14)))
            except ValueError:  # numerical sign flip at the bracket ends
                roots.append(float(grid[i] - f[i] * (grid[i + 1] - grid[i])
                                   / (f[i + 1] - f[i])))
        roots = sorted(set(roots))
        if roots:
            note = (f"{len(roots)} crossings; the innermost is reported"
                    if len(roots) > 1 else "")
            out.append(ResonancePoint(kind.name, kind.m, STATUS_FOUND,
                                      roots[0], tuple(roots), note))
            continue
        ff, rr = f[finite], grid[finite]
        tol = 1e-8 * scale
        s_lo = (ff[1] - ff[0])
        s_hi = (ff[-1] - ff[-2])
        flat_lo, flat_hi = abs(s_lo) < tol, abs(s_hi) < tol
        status, note = STATUS_NONE, ""
        if kind.rising:
            # inner ILR: f crosses upward going outward
            if ff[0] > tol:
                status = STATUS_OUTSIDE
                note = (f"an inner ILR, if any, lies inside {rr[0]:.4g} arcsec "
                        "(the curve is not resolved there)")
            elif ff[-1] < -tol and s_hi > 0 and not flat_hi:
                status = STATUS_OUTSIDE
                note = f"would lie beyond {rr[-1]:.4g} arcsec"
        else:
            if ff[-1] > tol and s_hi < 0 and not flat_hi:
                status = STATUS_OUTSIDE
                note = f"lies beyond the outermost radius {rr[-1]:.4g} arcsec"
            elif ff[0] < -tol and s_lo < 0 and not flat_lo:
                status = STATUS_OUTSIDE
                note = f"lies inside the innermost radius {rr[0]:.4g} arcsec"
        if status == STATUS_NONE and kind.sign == -1 and kind.m == 2:
            note = (f"Omega - kappa/2 peaks at {np.nanmax(ff) + om_p:.4g} "
                    "km/s/arcsec, below Omega_p" if np.nanmax(ff) < 0 else note)
        out.append(ResonancePoint(kind.name, kind.m, status, math.nan, (),
                                  note))
    return out


def find_resonances(curve, omega_p, *, distance_mpc: float | None = None,
                    ms=(2, 4), r_range_arcsec: tuple[float, float] | None = None,
                    n_grid: int = 2000) -> tuple[ResonancePoint, ...]:
    """All resonance radii of one curve for one pattern speed.

    Parameters
    ----------
    curve : SmoothCurve
        E.g. a :class:`~gyrometer.core.rcmodels.CurveFit`: ``v(r_arcsec)``
        km/s, ``dvdr(r_arcsec)`` km/s/arcsec, ``r_range_arcsec``.
    omega_p : Quantity
        Pattern speed, km/s/kpc (needs a distance) or km/s/arcsec.
    distance_mpc : float, optional
        Default: ``curve.distance_mpc`` when it has one.
    ms : sequence of int
        Multiplicities (2: ILR/OLR, 4: 4:1 resonances, others as asked);
        corotation is always included.
    r_range_arcsec : (float, float), optional
        Radii searched (default: the curve's data range).
    n_grid : int
        Points of the logarithmic search grid.
    """
    distance_mpc = distance_mpc or getattr(curve, "distance_mpc", None)
    om_p = float(omega_p_to_kms_arcsec(omega_p, distance_mpc))
    r_lo, r_hi = r_range_arcsec or curve.r_range_arcsec
    if not (0 <= r_lo < r_hi):
        raise RotationCurveError("invalid radial range", keyword="r_range",
                                 value=(r_lo, r_hi))
    return tuple(_point(curve, om_p, _kinds(ms), r_lo, r_hi, n_grid))


# --------------------------------------------------------------------------
# Monte Carlo table
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class ResonanceRow:
    """One line of a :class:`ResonanceTable`.

    Radii are in the disk plane. ``radius_*`` is the central estimate (best
    fit, central Omega_p); ``median/p16/p84`` summarise the Monte Carlo draws
    in which the resonance was found; kpc values are None without a
    distance.
    """

    name: str
    m: int
    status: str
    radius_arcsec: float
    median_arcsec: float
    p16_arcsec: float
    p84_arcsec: float
    fraction_found: float
    fraction_outside: float
    note: str = ""
    kpc_per_arcsec: float | None = None

    def _kpc(self, value: float) -> float | None:
        return None if self.kpc_per_arcsec is None else value * self.kpc_per_arcsec

    @property
    def radius_kpc(self) -> float | None:
        return self._kpc(self.radius_arcsec)

    @property
    def median_kpc(self) -> float | None:
        return self._kpc(self.median_arcsec)

    @property
    def p16_kpc(self) -> float | None:
        return self._kpc(self.p16_arcsec)

    @property
    def p84_kpc(self) -> float | None:
        return self._kpc(self.p84_arcsec)


@dataclass(frozen=True, eq=False)
class ResonanceTable:
    """Resonance radii with uncertainties.

    Attributes
    ----------
    rows : tuple of ResonanceRow
    omega_p_kms_arcsec : tuple of float
        (p16, median, p84) of the pattern-speed draws, km/s/arcsec.
    distance_mpc : float or None
    model : str
        Name of the rotation-curve model used.
    r_range_arcsec : tuple of float
        The data range searched.
    n_draws : int
    draws_arcsec : dict
        Name -> radius per draw, arcsec (NaN where not found): for
        rotation-rate Monte Carlo.
    notes : tuple of str
    """
    # (the ILR count is derived from ``rows`` and ``draws_arcsec``)

    rows: tuple[ResonanceRow, ...]
    omega_p_kms_arcsec: tuple[float, float, float]
    distance_mpc: float | None
    model: str
    r_range_arcsec: tuple[float, float]
    n_draws: int
    draws_arcsec: dict = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    @property
    def omega_p_kms_kpc(self) -> tuple[float, float, float] | None:
        if self.distance_mpc is None:
            return None
        s = kpc_per_arcsec(self.distance_mpc)
        return tuple(x / s for x in self.omega_p_kms_arcsec)

    @property
    def ilr_count(self) -> int | None:
        """Number of ILRs (0, 1 or 2) found at the central estimate; None
        when the table has no m = 2 rows."""
        names = ("ILR (inner)", "ILR (outer)")
        rows = [r for r in self.rows if r.name in names]
        if not rows:
            return None
        return sum(r.status == STATUS_FOUND for r in rows)

    @property
    def ilr_count_fractions(self) -> tuple[float, float, float] | None:
        """Fractions of the draws with no, one and two ILRs inside the data."""
        if "ILR (inner)" not in self.draws_arcsec:
            return None
        n = (np.isfinite(self.draws_arcsec["ILR (inner)"]).astype(int)
             + np.isfinite(self.draws_arcsec["ILR (outer)"]).astype(int))
        return tuple(float(np.mean(n == k)) for k in (0, 1, 2))

    def row(self, name: str) -> ResonanceRow:
        for row in self.rows:
            if row.name == name:
                return row
        raise KeyError(name)

    def to_table(self):
        """An :class:`astropy.table.QTable` (arcsec, kpc when known)."""
        from astropy.table import QTable

        t = QTable()
        t["resonance"] = [r.name for r in self.rows]
        t["m"] = [r.m for r in self.rows]
        t["status"] = [r.status for r in self.rows]
        for key in ("radius", "median", "p16", "p84"):
            t[f"{key}_arcsec"] = [getattr(r, f"{key}_arcsec") for r in self.rows] * u.arcsec
            if self.distance_mpc is not None:
                t[f"{key}_kpc"] = [getattr(r, f"{key}_kpc") for r in self.rows] * u.kpc
        t["fraction_found"] = [r.fraction_found for r in self.rows]
        t["fraction_outside"] = [r.fraction_outside for r in self.rows]
        t["note"] = [r.note for r in self.rows]
        t.meta.update(model=self.model, n_draws=self.n_draws,
                      distance_mpc=self.distance_mpc,
                      omega_p_kms_arcsec=list(self.omega_p_kms_arcsec))
        return t


def _omega_p_draws(omega_p, omega_p_p16, omega_p_p84, n, rng, distance_mpc):
    if hasattr(omega_p, "draws_kms_arcsec"):  # an UncertaintyBudget
        values = np.asarray(omega_p.draws_kms_arcsec, dtype=float)
    else:
        values = np.atleast_1d(omega_p_to_kms_arcsec(omega_p, distance_mpc))
    values = values[np.isfinite(values)]
    if values.size == 0:
        raise RotationCurveError("no finite pattern-speed values",
                                 keyword="omega_p")
    if values.size > 1:
        if omega_p_p16 is not None or omega_p_p84 is not None:
            raise RotationCurveError("give either pattern-speed draws or "
                                     "percentiles, not both", keyword="omega_p")
        return (rng.choice(values, size=n, replace=values.size < n),
                float(np.median(values)))
    median = float(values[0])
    if omega_p_p16 is None and omega_p_p84 is None:
        return np.full(n, median), median
    lo = float(omega_p_to_kms_arcsec(omega_p_p16, distance_mpc))
    hi = float(omega_p_to_kms_arcsec(omega_p_p84, distance_mpc))
    if not lo <= median <= hi:
        raise RotationCurveError("pattern-speed percentiles must satisfy "
                                 "p16 <= median <= p84", keyword="omega_p",
                                 value=(lo, median, hi))
    return split_normal_draws(median, lo, hi, n, rng), median


def resonance_budget(fit, omega_p, *, rng: np.random.Generator,
                     omega_p_p16=None, omega_p_p84=None, n_draws: int = 1000,
                     distance_mpc: float | None = None, ms=(2, 4),
                     vary_curve: bool = True,
                     r_range_arcsec: tuple[float, float] | None = None,
                     n_grid: int = 1000,
                     progress: ProgressCallback | None = None,
                     cancel: CancelFlag | None = None) -> ResonanceTable:
    """Monte Carlo resonance radii: pattern speed and curve uncertainties.

    Each draw takes a pattern speed (from the given draws, or a split
    normal through the median and 16th/84th percentiles, so asymmetric
    errors are kept) and, when ``vary_curve``, a curve from the model's
    uncertainty (:meth:`CurveFit.draw`), and finds every resonance as
    :func:`find_resonances` does. Each row reports the median and 16th/84th
    percentiles of the radius over the draws where it was found, and the
    fraction of draws in which it was found at all.

    Parameters
    ----------
    fit : CurveFit
        The rotation-curve model (with ``draw``) or any SmoothCurve when
        ``vary_curve=False``.
    omega_p : Quantity or UncertaintyBudget
        A value (with ``omega_p_p16`` / ``omega_p_p84``), an array of draws
        (km/s/kpc or km/s/arcsec), or a TW uncertainty budget.
    rng : numpy.random.Generator
    n_draws : int
    distance_mpc : float, optional
        Default: ``fit.distance_mpc``; needed for km/s/kpc input and kpc
        output. Distance errors are not propagated (radius ratios do not
        depend on the distance).
    """
    if n_draws < 1:
        raise RotationCurveError("n_draws must be >= 1", keyword="n_draws")
    distance_mpc = distance_mpc or getattr(fit, "distance_mpc", None)
    om_draws, om_central = _omega_p_draws(omega_p, omega_p_p16, omega_p_p84,
                                          n_draws, rng, distance_mpc)
    r_lo, r_hi = r_range_arcsec or fit.r_range_arcsec
    kinds = _kinds(ms)
    central = _point(fit, om_central, kinds, r_lo, r_hi, n_grid)
    if vary_curve and not hasattr(fit, "draw"):
        raise RotationCurveError(
            "this curve carries no uncertainty model to draw from",
            keyword="vary_curve",
            hint="fit it with fit_curve_models, or pass vary_curve=False")
    curves = fit.draw(n_draws, rng) if vary_curve else [fit] * n_draws
    radii = np.full((len(kinds), n_draws), np.nan)
    outside = np.zeros((len(kinds), n_draws), dtype=bool)
    for j in range(n_draws):
        if j % 50 == 0:
            check_cancel(cancel, "resonance Monte Carlo")
            report(progress, j, n_draws, "resonance Monte Carlo")
        for k, point in enumerate(_point(curves[j], float(om_draws[j]), kinds,
                                         r_lo, r_hi, n_grid)):
            radii[k, j] = point.radius_arcsec
            outside[k, j] = point.status == STATUS_OUTSIDE
    report(progress, n_draws, n_draws, "resonance Monte Carlo")
    scale = None if distance_mpc is None else kpc_per_arcsec(distance_mpc)
    rows = []
    for k, (kind, point) in enumerate(zip(kinds, central)):
        found = radii[k][np.isfinite(radii[k])]
        if found.size:
            p16, med, p84 = np.percentile(found, [16, 50, 84])
        else:
            p16 = med = p84 = math.nan
        rows.append(ResonanceRow(kind.name, kind.m, point.status,
                                 point.radius_arcsec, float(med), float(p16),
                                 float(p84), found.size / n_draws,
                                 float(outside[k].mean()), point.note, scale))
    order = {"ILR (inner)": 0, "ILR (outer)": 1, "UHR inner (4:1)": 2,
             "CR": 3, "UHR outer (4:1)": 4, "OLR": 5}
    rows.sort(key=lambda r: (order.get(r.name, 6), r.m))
    notes = [f"rotation curve model: {getattr(fit, 'name', 'curve')}",
             "epicyclic resonance radii are approximate for strong bars"]
    if not vary_curve:
        notes.append("rotation-curve errors not propagated (vary_curve=False)")
    return ResonanceTable(
        tuple(rows), tuple(float(x) for x in np.percentile(om_draws, [16, 50, 84])),
        distance_mpc, getattr(fit, "name", "curve"), (float(r_lo), float(r_hi)),
        n_draws, {kind.name: radii[k] for k, kind in enumerate(kinds)},
        tuple(notes))
