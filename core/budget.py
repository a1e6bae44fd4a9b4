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

__all__ = ["BudgetSettings", "run_budget", "summarise_term", "TERM_NAMES"]

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
        Processes for the geometry evaluations (1 = in process).
    exact : bool
        Recompute the exact slit weights for every geometry draw instead
        of interpolating integrals computed exactly on a grid (slower).
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
    exact: bool = False

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
    """TW slopes (km/s/arcsec) for a chunk of redrawn geometries."""
    rng = np.random.Generator(np.random.PCG64(seed_seq))
    xm, vm = _geometry_integrals(prep, dpa_deg, d_east, d_north, rng if noise else None)
    return _fit_draws(xm, vm, prep, rng if bootstrap else None)


def _geometry_integrals(prep: _Prep, dpa_deg, d_east, d_north, rng=None):
    """Slit integrals ``<X>, <V>`` of shape (draws, slits) for redrawn geometries.

    The exact slit weights of every (draw, slit) are recomputed at once by
    :func:`gyrometer.core.slits._strip_pixels`; bins and mirrored masking as
    in :mod:`gyrometer.core.tw`. With ``rng``, intensity and velocity are
    perturbed by their errors, independently per (slit, pixel) entry.
    """
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
    if rng is not None:
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
    return xm, vm


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
    xm, vm = _noise_integrals(prep_noise, seed_seq, nd)
    return _fit_draws(xm, vm, prep, None)


def _noise_integrals(prep_noise, seed_seq, nd: int):
    """Slit integrals of ``nd`` noise realisations at the nominal geometry."""
    m_slit, pix, inv, s_u, v_u, es_u, ev_u, x_e = prep_noise[:8]
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
    return xm, vm


#: The _Prep of a worker process, sent once by the pool initializer (worker
#: processes only; the parent never sets it).
_WORKER_PREP: _Prep | None = None


def _init_worker(prep: _Prep) -> None:
    global _WORKER_PREP
    _WORKER_PREP = prep


def _worker_integrals(dpa, de, dn):
    return _geometry_integrals(_WORKER_PREP, dpa, de, dn)


def _worker_chunk(dpa, de, dn, seed_seq, noise, bootstrap):
    return _geometry_chunk(_WORKER_PREP, dpa, de, dn, seed_seq, noise, bootstrap)


def _grid_integrals(prep: _Prep, axes, n_pts, draws, pool, chunk: int):
    """Integrals at ``draws`` interpolated from a grid of exact evaluations.

    ``axes`` names the geometry parameters varied (subset of ``dpa, de,
    dn``); the grid spans the range of the draws with ``n_pts`` nodes per
    axis; per-slit ``<X>`` and ``<V>`` are interpolated with cubic splines
    (:class:`scipy.interpolate.RegularGridInterpolator`, ``method="cubic"``,
    or :class:`~scipy.interpolate.CubicSpline` in one dimension). The exact
    weights are continuous in the geometry, so the integrals are smooth.
    """
    from scipy.interpolate import CubicSpline, RegularGridInterpolator
    nodes = []
    for name, n in zip(axes, n_pts):
        lo, hi = float(np.min(draws[name])), float(np.max(draws[name]))
        if hi - lo < 1e-12:
            lo, hi = lo - 1e-6, hi + 1e-6
        nodes.append(np.linspace(lo, hi, n))
    mesh = np.meshgrid(*nodes, indexing="ij")
    flat = {name: m.ravel() for name, m in zip(axes, mesh)}
    zeros = np.zeros(mesh[0].size)
    dpa = flat.get("dpa", zeros)
    de = flat.get("de", zeros)
    dn = flat.get("dn", zeros)
    pieces = [(dpa[i:i + m], de[i:i + m], dn[i:i + m]) for i, m in _chunks(dpa.size, chunk)]
    if pool is None:
        out = [_geometry_integrals(prep, *p) for p in pieces]
    else:
        out = [f.result() for f in [pool.submit(_worker_integrals, *p) for p in pieces]]
    xm = np.concatenate([o[0] for o in out])
    vm = np.concatenate([o[1] for o in out])
    ns = xm.shape[1]
    shape = tuple(n_pts)
    values = np.concatenate([xm, vm], axis=1).reshape(shape + (2 * ns,))
    points = np.column_stack([draws[name] for name in axes])
    if len(axes) == 1:
        res = CubicSpline(nodes[0], values, axis=0)(points[:, 0])
    else:
        res = RegularGridInterpolator(nodes, values, method="cubic")(points)
    return res[:, :ns], res[:, ns:]


def _prepare_noise(maps: MapSet, geometry: DiskGeometry, weights, symmetric: bool):
    """Per-pixel noise set-up at the nominal geometry (used rows only)."""
    layout = _layout(weights)
    terms, valid = _pixel_terms_maps(layout, maps, geometry.vsys_kms)
    bad = _row_bad(layout, valid)
    use_row = _used_rows(layout, bad, symmetric)
    keep = valid & use_row[layout.row]
    entries = np.flatnonzero(keep)
    flat = layout.flat[entries]
    pix, inv = np.unique(flat, return_inverse=True)
    slit = layout.row_slit[layout.row[entries]]
    w = layout.weight[entries]
    m_slit = sp.csr_matrix((w, (slit, np.arange(entries.size))),
                           shape=(layout.n_slits, entries.size))
    get = lambda a: np.asarray(a, float).ravel()[pix]      # noqa: E731
    s_u, v_u = get(maps.intensity), get(maps.velocity_kms) - geometry.vsys_kms
    es_u, ev_u = get(maps.intensity_err), get(maps.velocity_err_kms)
    x_e = layout.x_arcsec[entries]
    # Sums B = sum w S, A = sum w S X, C = sum w S V are Gaussian in the
    # pixel noise to first order; their covariance over all slits follows
    # from G Sigma G^T with G the coefficients of each pixel's noise.
    ns = layout.n_slits
    cols = np.arange(entries.size)
    rows = np.concatenate([slit, ns + slit, 2 * ns + slit])
    g_s = sp.csr_matrix((np.concatenate([w, w * x_e, w * v_u[inv]]) * np.tile(es_u[inv], 3),
                         (rows, np.tile(inv, 3))), shape=(3 * ns, pix.size))
    g_v = sp.csr_matrix((w * s_u[inv] * ev_u[inv], (2 * ns + slit, inv)),
                        shape=(3 * ns, pix.size))
    cov = (g_s @ g_s.T + g_v @ g_v.T).toarray()
    # second-order term sum w dS dV: zero mean, variance sum w^2 sS^2 sV^2
    cov[2 * ns + np.arange(ns), 2 * ns + np.arange(ns)] += np.bincount(
        slit, weights=(w * es_u[inv] * ev_u[inv]) ** 2, minlength=ns)
    base = np.concatenate([m_slit @ s_u[inv], m_slit @ (s_u[inv] * x_e),
                           m_slit @ (s_u[inv] * v_u[inv])])
    del cols
    vals, vecs = np.linalg.eigh(cov)
    root = vecs * np.sqrt(np.clip(vals, 0.0, None))       # cov = root root^T
    return (m_slit, pix, inv, s_u, v_u, es_u, ev_u, x_e, base, root)


def _noise_sums(prep_noise, seed_seq, nd: int):
    """Slit integrals of ``nd`` noise realisations, drawn from the Gaussian
    distribution of the slit sums (covariance of :func:`_prepare_noise`)."""
    base, root = prep_noise[8], prep_noise[9]
    rng = np.random.Generator(np.random.PCG64(seed_seq))
    draws = base + rng.standard_normal((nd, base.size)) @ root.T
    ns = base.size // 3
    bb, aa, cc = draws[:, :ns], draws[:, ns:2 * ns], draws[:, 2 * ns:]
    with np.errstate(divide="ignore", invalid="ignore"):
        return (np.where(bb > 0, aa / bb, np.nan), np.where(bb > 0, cc / bb, np.nan))


def summarise_term(name: str, omega) -> BudgetTerm:
    """Percentiles of one term's draws of Omega_p (NaN draws dropped).

    Raises FitError when fewer than two draws are valid. ``share`` is left
    NaN; the caller fills it once every term is known.
    """
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

    Notes
    -----
    Noise draws: by default the slit sums ``sum w S``, ``sum w S X`` and
    ``sum w S (V - Vsys)`` of all slits are drawn from their joint Gaussian
    distribution (exact for the linear terms, including pixels shared by
    overlapping slits; the small ``dS dV`` term as a Gaussian of the right
    variance); with ``settings.exact`` every pixel is perturbed.
    Geometry draws: with ``settings.exact`` every draw recomputes the exact
    weights of every slit; otherwise (default) the integrals are computed
    exactly on a grid spanning the draws (21 PA values; 7 x 7 centre
    shifts; 9 x 4 x 4 for the combined term) and interpolated with cubic
    splines, which the tests check against the exact draws. In the combined
    term the noise enters as the per-slit change of ``<X>``, ``<V>`` of a
    noise realisation at the nominal geometry (first order).
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
    chunk = max(1, int(settings.chunk))
    chunks = _chunks(n, chunk)
    ig = measurement.integrals
    x_nom = np.broadcast_to(ig.x_mean_arcsec, (n, ig.n_slits))
    v_nom = np.broadcast_to(ig.v_mean_kms, (n, ig.n_slits))
    results: dict[str, np.ndarray] = {}
    total = sum(want.values()) + 1
    step = [0]

    def tick(stage):
        step[0] += 1
        report(progress, step[0], total, f"uncertainty budget: {stage}")
        check_cancel(cancel, "uncertainty budget")

    def gen(name, k=0):
        return np.random.Generator(np.random.PCG64(seeds[name].spawn(k + 1)[k]))

    def inc_draws(rng):
        i = rng.normal(geometry.inc_deg, i_sig, n)
        return np.sin(np.radians(np.clip(i, 0.5, 89.5)))

    pool = None
    if settings.workers > 1:
        pool = ProcessPoolExecutor(max_workers=int(settings.workers),
                                   initializer=_init_worker, initargs=(prep,))
    try:
        def exact_term(name, dpa, de, dn, noise, boot):
            seqs = seeds[name].spawn(len(chunks) + 2)[2:]
            args = [(prep, dpa[i:i + m], de[i:i + m], dn[i:i + m], q, noise, boot)
                    for (i, m), q in zip(chunks, seqs)]
            if pool is None:
                out = []
                for a in args:
                    check_cancel(cancel, "uncertainty budget")
                    out.append(_geometry_chunk(*a))
            else:
                out = [f.result() for f in [pool.submit(_worker_chunk, *a[1:])
                                            for a in args]]
            return np.concatenate(out)

        def grid_xv(draws, sizes):
            axes = tuple(k for k in ("dpa", "de", "dn") if k in sizes)
            return _grid_integrals(prep, axes, [sizes[k] for k in axes], draws, pool, chunk)

        pn = None
        if want["noise"]:
            pn = _prepare_noise(maps, geometry, weights, symmetric)
            seqs = seeds["noise"].spawn(len(chunks))
            noise_fn = _noise_integrals if settings.exact else _noise_sums
            out = [noise_fn(pn, q, m) for (_, m), q in zip(chunks, seqs)]
            xn = np.concatenate([o[0] for o in out])
            vn = np.concatenate([o[1] for o in out])
            results["noise"] = _fit_draws(xn, vn, prep, None) / sin_i
            tick("noise")
        if want["slit bootstrap"]:
            results["slit bootstrap"] = _fit_draws(x_nom, v_nom, prep,
                                                   gen("slit bootstrap")) / sin_i
            tick("slit bootstrap")
        zeros = np.zeros(n)
        if want["position angle"]:
            dpa = gen("position angle").normal(0.0, pa_sig, n)
            if settings.exact:
                slope = exact_term("position angle", dpa, zeros, zeros, False, False)
            else:
                xm, vm = grid_xv({"dpa": dpa}, {"dpa": 21})
                slope = _fit_draws(xm, vm, prep, None)
            results["position angle"] = slope / sin_i
            tick("position angle")
        if want["centre"]:
            de, dn = gen("centre").normal(0.0, c_sig, (2, n))
            if settings.exact:
                slope = exact_term("centre", zeros, de, dn, False, False)
            else:
                xm, vm = grid_xv({"de": de, "dn": dn}, {"de": 7, "dn": 7})
                slope = _fit_draws(xm, vm, prep, None)
            results["centre"] = slope / sin_i
            tick("centre")
        if want["inclination"]:
            results["inclination"] = measurement.fit.slope / inc_draws(gen("inclination"))
            tick("inclination")
        rng = gen("all combined")
        dpa = rng.normal(0.0, pa_sig, n) if want["position angle"] else zeros
        de, dn = (rng.normal(0.0, c_sig, (2, n)) if want["centre"] else (zeros, zeros))
        s_i = inc_draws(rng) if want["inclination"] else np.full(n, sin_i)
        boot_rng = gen("all combined", 1) if want["slit bootstrap"] else None
        geo_on = want["position angle"] or want["centre"]
        if settings.exact and (geo_on or want["noise"]):
            comb = exact_term("all combined", dpa, de, dn, want["noise"],
                              want["slit bootstrap"])
        else:
            xm, vm = np.array(x_nom), np.array(v_nom)
            if geo_on:
                draws, sizes = {}, {}
                if want["position angle"]:
                    draws["dpa"], sizes["dpa"] = dpa, 9
                if want["centre"]:
                    draws["de"], sizes["de"] = de, 4
                    draws["dn"], sizes["dn"] = dn, 4
                xm, vm = grid_xv(draws, sizes)
            if want["noise"]:
                seqs = seeds["all combined"].spawn(len(chunks) + 2)[2:]
                out = [_noise_sums(pn, q, m) for (_, m), q in zip(chunks, seqs)]
                xm = xm + np.concatenate([o[0] for o in out]) - x_nom
                vm = vm + np.concatenate([o[1] for o in out]) - v_nom
            comb = _fit_draws(xm, vm, prep, boot_rng)
        results["all combined"] = comb / s_i
        tick("all combined")
    finally:
        if pool is not None:
            pool.shutdown()
    terms = [summarise_term(name, results[name]) for name in TERM_NAMES if name in results]
    var_sum = sum(t.sigma ** 2 for t in terms[:-1])
    terms = [BudgetTerm(t.name, t.n_draws, t.p16, t.median, t.p84, t.sigma,
                        (t.sigma ** 2 / var_sum) if var_sum > 0 else float("nan"))
             for t in terms]
    draws = results["all combined"]
    return UncertaintyBudget(tuple(terms), draws[np.isfinite(draws)], int(settings.seed),
                             geometry.distance_mpc)
