"""Monte Carlo uncertainty budget of a Tremaine-Weinberg pattern speed.

Terms (each sampled alone, then all together in one run, as recommended by
Garma-Oehmichen et al. 2020, MNRAS 491, 3655; DOMAIN notes section 2):

* ``"noise"``: intensity and velocity perturbed pixel by pixel with their
  error maps (Aguerri et al. 2015, A&A 576, A102), integrals and fit redone;
* ``"slit bootstrap"``: slits resampled with replacement (common practice);
  captures scatter beyond the formal errors, e.g. slits closer than the PSF;
* ``"position angle"``, ``"centre"``: the line-of-nodes frame redrawn, the
  exact slit weights recomputed for every draw (vectorised over draws);
* ``"inclination"``: ``Omega_p = slope / sin i`` with ``i`` redrawn;
* ``"all combined"``: every enabled source in each draw.

Each term reports the median and 16th/84th percentiles of Omega_p
(asymmetric errors) and its share of the summed variances. The York fit of
every draw uses the nominal per-slit errors. Draws are reproducible: each
term and each chunk of draws has its own child of
``numpy.random.SeedSequence(seed)`` (PCG64), so results do not depend on the
number of worker processes.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from .dataset import MapSet
from .errors import DataContentError, FitError
from .geometry import DiskGeometry
from .progress import CancelFlag, ProgressCallback, check_cancel, report
from .results import BudgetTerm, TWMeasurement, UncertaintyBudget
from .slits import PixelFrame, Slit, SlitSet, _strip_pixels, pixel_frame, slit_weights
from .tw import _layout, _pixel_terms_maps, _row_bad, _used_rows, measure
from .yorkfit import york_slopes

__all__ = ["BudgetSettings", "run_budget", "TERM_NAMES"]

#: Names of the budget terms, in table order.
TERM_NAMES = ("noise", "slit bootstrap", "position angle", "centre",
              "inclination", "all combined")


@dataclass(frozen=True)
class BudgetSettings:
    """Settings of :func:`run_budget`.

    Attributes
    ----------
    n_draws : int
        Draws per term.
    seed : int
        Seed of the ``numpy.random.SeedSequence`` (PCG64 generators).
    noise, bootstrap, position_angle, centre, inclination : bool
        Terms switched on.
    pa_err_deg, center_err_arcsec, inc_err_deg : float or None
        1-sigma uncertainties; None takes the geometry's ``*_err`` fields.
        The centre is drawn with this sigma along east and north each.
    workers : int
        Processes for the geometry draws (1 = in process).
    chunk : int
        Draws evaluated together (memory ~ chunk x slit pixels).
    """

    n_draws: int = 1000
    seed: int = 20240601
    noise: bool = True
    bootstrap: bool = True
    position_angle: bool = True
    centre: bool = True
    inclination: bool = True
    pa_err_deg: float | None = None
    center_err_arcsec: float | None = None
    inc_err_deg: float | None = None
    workers: int = 1
    chunk: int = 100

    def __post_init__(self) -> None:
        if int(self.n_draws) < 10:
            raise DataContentError("an uncertainty budget needs at least 10 draws",
                                   keyword="n_draws", value=self.n_draws)
        for name in ("pa_err_deg", "center_err_arcsec", "inc_err_deg"):
            value = getattr(self, name)
            if value is not None and not (math.isfinite(value) and value >= 0):
                raise DataContentError(f"{name} must be >= 0", keyword=name,
                                       value=value)


@dataclass(frozen=True, eq=False)
class _Prep:
    """Everything a geometry draw needs (picklable for worker processes)."""

    frame: PixelFrame
    pa_deg: float
    bounds: np.ndarray        # (n_slits, 4): x_lo, x_hi, y_lo, y_hi
    s: np.ndarray             # flat intensity (0 where invalid)
    v: np.ndarray             # flat V - Vsys
    es: np.ndarray            # flat errors (0 if none)
    ev: np.ndarray
    valid: np.ndarray         # flat validity
    k_max: int
    symmetric: bool
    sx: np.ndarray            # nominal per-slit errors for the York fit
    sy: np.ndarray
    r: np.ndarray
    used: np.ndarray          # slits in the fit


def _prepare(maps: MapSet, geometry: DiskGeometry, slits, measurement: TWMeasurement,
             frame: PixelFrame, symmetric: bool) -> _Prep:
    half_w = np.array([0.5 * s.width_arcsec for s in slits])
    xc = np.array([s.x_center_arcsec for s in slits])
    hl = np.array([s.half_length_arcsec for s in slits])
    y = np.array([s.offset_arcsec for s in slits])
    ny, nx = frame.shape
    limit = 0.5 * math.hypot(ny, nx) * max(np.abs(frame.jac).sum(axis=0)) \
        + float(np.hypot(*frame.origin)) + 4 * frame.pixel_scale_arcsec
    bounds = np.column_stack([np.maximum(xc - hl, -limit), np.minimum(xc + hl, limit),
                              y - half_w, y + half_w])
    s = np.asarray(maps.intensity, float).ravel()
    v = np.asarray(maps.velocity_kms, float).ravel() - geometry.vsys_kms
    valid = np.isfinite(s) & np.isfinite(v)
    if maps.intensity_err is not None and maps.velocity_err_kms is not None:
        es = np.asarray(maps.intensity_err, float).ravel()
        ev = np.asarray(maps.velocity_err_kms, float).ravel()
        valid &= np.isfinite(es) & np.isfinite(ev)
    else:
        es = ev = np.zeros_like(s)
    dx = frame.pixel_scale_arcsec
    k_max = int(math.ceil(np.max(np.abs(bounds[:, :2])) / dx)) + 3
    ig = measurement.integrals
    return _Prep(frame, geometry.pa_deg, bounds, np.where(valid, s, 0.0),
                 np.where(valid, v, 0.0), np.where(valid, es, 0.0),
                 np.where(valid, ev, 0.0), valid, k_max, symmetric,
                 ig.x_err_arcsec.copy(), ig.v_err_kms.copy(), ig.xv_corr.copy(),
                 measurement.used.copy())


def _geometry_chunk(prep: _Prep, dpa_deg, d_east, d_north, seed_seq,
                    noise: bool, bootstrap: bool) -> np.ndarray:
    """TW slopes (km/s/arcsec) for a chunk of redrawn geometries.

    The exact slit weights of every (draw, slit) are recomputed at once by
    :func:`gyrometer.core.slits._strip_pixels`; bins and mirrored masking as
    in :mod:`gyrometer.core.tw`.
    """
    rng = np.random.Generator(np.random.PCG64(seed_seq))
    nd = dpa_deg.size
    ns = prep.bounds.shape[0]
    fr = prep.frame
    pa = np.radians(prep.pa_deg + dpa_deg)
    sn, cs = np.sin(pa)[:, None], np.cos(pa)[:, None]
    g_x = sn * fr.jac[0] + cs * fr.jac[1]                  # (nd, 2)
    g_y = cs * fr.jac[0] - sn * fr.jac[1]
    oe, on = fr.origin[0] - d_east, fr.origin[1] - d_north
    x0 = sn[:, 0] * oe + cs[:, 0] * on
    y0 = cs[:, 0] * oe - sn[:, 0] * on
    rep = lambda a: np.repeat(a, ns, axis=0)               # noqa: E731
    b = np.tile(prep.bounds, (nd, 1))
    strip, flat, w, x, _ = _strip_pixels(rep(g_x), rep(x0), rep(g_y), rep(y0),
                                         b[:, 0], b[:, 1], b[:, 2], b[:, 3], fr.shape)
    dx = fr.pixel_scale_arcsec
    n_bins = 2 * prep.k_max + 1
    kk = np.clip(np.rint(x / dx).astype(np.int64), -prep.k_max, prep.k_max)
    row = strip * n_bins + prep.k_max + kk
    inside = flat >= 0
    f = np.maximum(flat, 0)
    valid = inside & prep.valid[f]
    s = prep.s[f]
    v = prep.v[f]
    if noise:
        s = s + prep.es[f] * rng.standard_normal(s.size)
        v = v + prep.ev[f] * rng.standard_normal(v.size)
    wv = w * valid
    n_rows = nd * ns * n_bins
    sums_b = np.bincount(row, weights=wv * s, minlength=n_rows)
    sums_a = np.bincount(row, weights=wv * s * x, minlength=n_rows)
    sums_c = np.bincount(row, weights=wv * s * v, minlength=n_rows)
    has = np.bincount(row, weights=w, minlength=n_rows) > 0
    if prep.symmetric:
        bad = np.bincount(row, weights=w * ~valid, minlength=n_rows) > 0
        ok = (has & ~bad).reshape(nd * ns, n_bins)
        use = (ok & ok[:, ::-1]).ravel()
    else:
        use = has
    bb = (sums_b * use).reshape(nd, ns, n_bins).sum(-1)
    aa = (sums_a * use).reshape(nd, ns, n_bins).sum(-1)
    cc = (sums_c * use).reshape(nd, ns, n_bins).sum(-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        xm = np.where(bb > 0, aa / bb, np.nan)
        vm = np.where(bb > 0, cc / bb, np.nan)
    return _fit_draws(xm, vm, prep, rng if bootstrap else None)


def _fit_draws(xm, vm, prep: _Prep, rng) -> np.ndarray:
    """York slopes of per-draw slit integrals (optionally slit-bootstrapped)."""
    idx = np.flatnonzero(prep.used)
    xm, vm = xm[:, idx], vm[:, idx]
    sx, sy, r = prep.sx[idx], prep.sy[idx], prep.r[idx]
    if not (np.all(np.isfinite(sx)) and np.all(np.isfinite(sy))):
        sx, sy, r = np.zeros_like(sx), np.ones_like(sy), np.zeros_like(r)
    sx, sy, r = (np.broadcast_to(a, xm.shape) for a in (sx, sy, r))
    if rng is not None:
        pick = rng.integers(0, idx.size, size=xm.shape)
        rows = np.arange(xm.shape[0])[:, None]
        xm, vm, sx, sy, r = (a[rows, pick] for a in (xm, vm, sx, sy, r))
    with np.errstate(all="ignore"):
        return york_slopes(xm, vm, sx, sy, r)


def _noise_chunk(prep_noise, seed_seq, nd: int, prep: _Prep) -> np.ndarray:
    """Slopes for ``nd`` noise realisations at the nominal geometry."""
    m_slit, pix, inv, s_u, v_u, es_u, ev_u, x_e = prep_noise
    rng = np.random.Generator(np.random.PCG64(seed_seq))
    s = s_u + es_u * rng.standard_normal((nd, pix.size))
    v = v_u + ev_u * rng.standard_normal((nd, pix.size))
    s_e, v_e = s[:, inv], v[:, inv]
    bb = (m_slit @ s_e.T).T
    aa = (m_slit @ (s_e * x_e).T).T
    cc = (m_slit @ (s_e * v_e).T).T
    with np.errstate(divide="ignore", invalid="ignore"):
        xm = np.where(bb > 0, aa / bb, np.nan)
        vm = np.where(bb > 0, cc / bb, np.nan)
    return _fit_draws(xm, vm, prep, None)


def _prepare_noise(maps: MapSet, geometry: DiskGeometry, weights, symmetric: bool):
    layout = _layout(weights)
    terms, valid = _pixel_terms_maps(layout, maps, geometry.vsys_kms)
    bad = _row_bad(layout, valid)
    use_row = _used_rows(layout, bad, symmetric)
    keep = valid & use_row[layout.row]
    entries = np.flatnonzero(keep)
    flat = layout.flat[entries]
    pix, inv = np.unique(flat, return_inverse=True)
    m_slit = sp.csr_matrix((layout.weight[entries],
                            (layout.row_slit[layout.row[entries]], np.arange(entries.size))),
                           shape=(layout.n_slits, entries.size))
    get = lambda a: np.asarray(a, float).ravel()[pix]      # noqa: E731
    return (m_slit, pix, inv, get(maps.intensity),
            get(maps.velocity_kms) - geometry.vsys_kms, get(maps.intensity_err),
            get(maps.velocity_err_kms), layout.x_arcsec[entries])


def _summarise(name: str, omega) -> BudgetTerm:
    omega = np.asarray(omega, float)
    good = omega[np.isfinite(omega)]
    if good.size < 2:
        raise FitError(f"the '{name}' term gave fewer than two valid draws",
                       hint="check the slits and the uncertainties")
    p16, med, p84 = np.percentile(good, [16, 50, 84])
    return BudgetTerm(name, int(good.size), float(p16), float(med), float(p84),
                      float(0.5 * (p84 - p16)), float("nan"))


def _chunks(n: int, size: int):
    return [(i, min(size, n - i)) for i in range(0, n, size)]


def run_budget(maps: MapSet, geometry: DiskGeometry, slits: SlitSet | Sequence[Slit],
               settings: BudgetSettings = BudgetSettings(), *,
               symmetric: bool | None = None, exclude: Sequence[int] = (),
               measurement: TWMeasurement | None = None,
               progress: ProgressCallback | None = None,
               cancel: CancelFlag | None = None) -> UncertaintyBudget:
    """Monte Carlo uncertainty budget of Omega_p (maps route).

    Parameters
    ----------
    maps : MapSet
        Error maps are needed for the noise term (skipped without them).
    geometry : DiskGeometry
        Nominal geometry; its ``pa_err_deg``, ``center_err_arcsec`` and
        ``inc_err_deg`` are the default sigmas.
    slits : SlitSet or sequence of Slit
    settings : BudgetSettings
    symmetric : bool, optional
        Defaults to ``slits.symmetric``.
    exclude : sequence of int
        Slits left out of the fit.
    measurement : TWMeasurement, optional
        The nominal measurement (computed if not given).
    progress, cancel
        See :mod:`gyrometer.core.progress`.

    Returns
    -------
    UncertaintyBudget
        One :class:`BudgetTerm` per enabled term with a non-zero sigma, then
        ``"all combined"``; Omega_p in km/s/arcsec.
    """
    items = tuple(slits)
    if symmetric is None:
        symmetric = getattr(slits, "symmetric", True)
    frame = pixel_frame(maps.wcs, maps.shape, geometry)
    weights = slit_weights(items, geometry, maps.wcs, maps.shape, frame=frame)
    if measurement is None:
        measurement = measure(maps, geometry, items, symmetric=symmetric,
                              exclude=exclude, weights=weights, warn=False)
    prep = _prepare(maps, geometry, items, measurement, frame, symmetric)
    sin_i = geometry.sin_i
    n = int(settings.n_draws)
    pa_sig = geometry.pa_err_deg if settings.pa_err_deg is None else settings.pa_err_deg
    c_sig = (geometry.center_err_arcsec if settings.center_err_arcsec is None
             else settings.center_err_arcsec)
    i_sig = geometry.inc_err_deg if settings.inc_err_deg is None else settings.inc_err_deg
    have_err = maps.intensity_err is not None and maps.velocity_err_kms is not None
    want = {
        "noise": settings.noise and have_err,
        "slit bootstrap": settings.bootstrap and int(measurement.used.sum()) >= 3,
        "position angle": settings.position_angle and pa_sig > 0,
        "centre": settings.centre and c_sig > 0,
        "inclination": settings.inclination and i_sig > 0,
    }
    seeds = dict(zip(TERM_NAMES, np.random.SeedSequence(settings.seed).spawn(len(TERM_NAMES))))
    chunks = _chunks(n, max(1, int(settings.chunk)))
    slope0 = measurement.fit.slope
    results: dict[str, np.ndarray] = {}
    total = sum(want.values()) + 1
    done = 0

    def inc_draws(rng):
        i = rng.normal(geometry.inc_deg, i_sig, n) if i_sig > 0 else np.full(n, geometry.inc_deg)
        return np.sin(np.radians(np.clip(i, 0.5, 89.5)))

    pool = None
    if settings.workers > 1:
        pool = ProcessPoolExecutor(max_workers=int(settings.workers))
    try:
        def geometry_term(name, dpa, de, dn, noise, boot):
            seqs = seeds[name].spawn(len(chunks))
            args = [(prep, dpa[i:i + m], de[i:i + m], dn[i:i + m], q, noise, boot)
                    for (i, m), q in zip(chunks, seqs)]
            out = []
            if pool is None:
                for a in args:
                    check_cancel(cancel, "uncertainty budget")
                    out.append(_geometry_chunk(*a))
            else:
                futures = [pool.submit(_geometry_chunk, *a) for a in args]
                for fut in futures:
                    check_cancel(cancel, "uncertainty budget")
                    out.append(fut.result())
            return np.concatenate(out)

        zeros = np.zeros(n)
        if want["noise"]:
            check_cancel(cancel, "uncertainty budget")
            pn = _prepare_noise(maps, geometry, weights, symmetric)
            seqs = seeds["noise"].spawn(len(chunks))
            results["noise"] = np.concatenate(
                [_noise_chunk(pn, q, m, prep) for (_, m), q in zip(chunks, seqs)]) / sin_i
            done += 1
            report(progress, done, total, "uncertainty budget: noise")
        if want["slit bootstrap"]:
            rng = np.random.Generator(np.random.PCG64(seeds["slit bootstrap"]))
            ig = measurement.integrals
            xm = np.broadcast_to(ig.x_mean_arcsec, (n, ig.n_slits))
            vm = np.broadcast_to(ig.v_mean_kms, (n, ig.n_slits))
            results["slit bootstrap"] = _fit_draws(xm, vm, prep, rng) / sin_i
            done += 1
            report(progress, done, total, "uncertainty budget: slit bootstrap")
        if want["position angle"]:
            rng = np.random.Generator(np.random.PCG64(seeds["position angle"].spawn(1)[0]))
            dpa = rng.normal(0.0, pa_sig, n)
            results["position angle"] = geometry_term("position angle", dpa, zeros, zeros,
                                                      False, False) / sin_i
            done += 1
            report(progress, done, total, "uncertainty budget: position angle")
        if want["centre"]:
            rng = np.random.Generator(np.random.PCG64(seeds["centre"].spawn(1)[0]))
            de, dn = rng.normal(0.0, c_sig, (2, n))
            results["centre"] = geometry_term("centre", zeros, de, dn, False, False) / sin_i
            done += 1
            report(progress, done, total, "uncertainty budget: centre")
        if want["inclination"]:
            rng = np.random.Generator(np.random.PCG64(seeds["inclination"]))
            results["inclination"] = slope0 / inc_draws(rng)
            done += 1
            report(progress, done, total, "uncertainty budget: inclination")
        rng = np.random.Generator(np.random.PCG64(seeds["all combined"].spawn(1)[0]))
        dpa = rng.normal(0.0, pa_sig, n) if want["position angle"] else zeros
        de, dn = (rng.normal(0.0, c_sig, (2, n)) if want["centre"] else (zeros, zeros))
        s_i = inc_draws(rng) if want["inclination"] else np.full(n, sin_i)
        if want["position angle"] or want["centre"] or want["noise"]:
            comb = geometry_term("all combined", dpa, de, dn, want["noise"],
                                 want["slit bootstrap"])
        else:
            ig = measurement.integrals
            comb = _fit_draws(np.broadcast_to(ig.x_mean_arcsec, (n, ig.n_slits)),
                              np.broadcast_to(ig.v_mean_kms, (n, ig.n_slits)), prep,
                              rng if want["slit bootstrap"] else None)
        results["all combined"] = comb / s_i
        report(progress, total, total, "uncertainty budget: all combined")
    finally:
        if pool is not None:
            pool.shutdown()
    terms = [_summarise(name, results[name]) for name in TERM_NAMES if name in results]
    var_sum = sum(t.sigma ** 2 for t in terms[:-1])
    terms = [BudgetTerm(t.name, t.n_draws, t.p16, t.median, t.p84, t.sigma,
                        (t.sigma ** 2 / var_sum) if var_sum > 0 else float("nan"))
             for t in terms]
    draws = results["all combined"]
    return UncertaintyBudget(tuple(terms), draws[np.isfinite(draws)], int(settings.seed),
                             geometry.distance_mpc)
