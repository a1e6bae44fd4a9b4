"""Pattern speed against radius: the radial Tremaine-Weinberg method.

A single pattern speed hides bars and spirals that turn at different rates.
Merrifield, Rand & Meidt (2006, MNRAS 366, L17) let the pattern speed vary
with disk-plane radius, ``Omega_p(r)``; Meidt et al. (2008, ApJ 676, 899)
solved the resulting linear system with regularisation. This module does the
same on a :class:`~gyrometer.core.dataset.MapSet`.

Method
------
For a tracer that obeys continuity and whose pattern speed depends only on
radius, the Tremaine & Weinberg (1984, ApJ 282, L5) steps give, per slit at
offset ``Y`` (Merrifield, Rand & Meidt 2006; derivation in DOMAIN.md §1)::

    int S (V_los - V_sys) dX = sin i int Omega_p(r) X S dX,
    r = sqrt(X**2 + Y**2 / cos(i)**2).

``Omega_p(r)`` is taken constant in annuli ``j`` (disk-plane radius). Dividing
each slit by its flux ``F_k = int S dX`` gives one linear equation per slit::

    <V>_k = sum_j A_kj Omega_j  (+ dV),
    A_kj  = sin i * sum_{samples s of slit k with r_s in annulus j} S_s X_s a_s / F_k,

over the sample points ``s`` of the slit (area ``a_s``; see "Sampling and
masks" below), ``F_k = sum_s S_s a_s``. ``sum_j A_kj =
sin i <X>_k``, so with a single annulus the equation is the standard one,
``<V>_k = Omega_p sin i <X>_k`` (plus an intercept when ``dV`` is fitted).

Annuli
------
By default (``RadialSettings()``) one annulus starts at the innermost
deprojected radius reached by each slit, i.e. at ``(|Y_k| - width/2) / cos i``
up to the pixel sampling; slits at ``+Y`` and ``-Y`` share an annulus. A slit
then only sees its own annulus and those outside it, so ``A`` is upper
triangular in the order of increasing ``|Y|`` (Merrifield et al. 2006): the
outermost slits fix the outermost annulus, and so inwards. Annuli may also be
given explicitly (``edges_arcsec``) or as ``n_annuli`` equal-width rings from
the centre to the outermost slit sample; samples outside explicit edges are
counted in the first or last annulus.

Regularisation
--------------
The diagonal terms of the triangular system are the slit pixels nearest the
minor axis, where ``X`` is small, so the plain inverse amplifies noise.
Meidt et al. (2008) regularise; here the weighted least-squares problem is
solved with Tikhonov regularisation (Tikhonov 1963; e.g. Hansen 1998,
"Rank-deficient and discrete ill-posed problems", SIAM, ch. 5)::

    minimise  sum_k (<V>_k - sum_j A_kj Omega_j - dV)**2 / sigma_k**2
              + mu * |L Omega|**2,

``L`` the first-difference operator (``Omega_{j+1} - Omega_j``; a smooth
curve is preferred, a constant curve costs nothing) or the second difference.
The strength is ``mu = lam * trace(A^T W A) / trace(L^T L)`` so that ``lam``
is dimensionless. ``lam`` is a user value or chosen by generalised
cross-validation (Golub, Heath & Wahba 1979, Technometrics 21, 215),
``GCV = m |r|**2 / (m - trace H)**2`` with ``r`` the weighted residuals and
``H`` the influence matrix, on a logarithmic grid from 1e-4 to 1e2 (the
floor keeps noiseless data from driving lam to 0). ``dV`` is not
regularised.

Uncertainties
-------------
``sigma_k`` of ``<V>_k`` is propagated linearly from the error maps. The
covariance of the solution is ``G C G^T`` with ``G`` the regularised inverse
(linear propagation; errors of ``A`` are neglected). When ``n_mc > 0`` and
error maps exist, the maps are also perturbed by their errors ``n_mc`` times
(seeded ``numpy.random.Generator``; ``A`` and ``<V>`` both recomputed, ``lam``
held fixed) and the standard deviation of the draws is the reported error
(Monte Carlo on noise as in Aguerri et al. 2015, A&A 576, A102). Without
error maps, ``sigma_k`` is set from the scatter of the residuals.

A regularised solution is a smoothed version of the truth: the model
resolution matrix ``R = (A^T W A + mu L^T L)^-1 A^T W A`` gives, in row
``j``, the averaging kernel of annulus ``j``. Its diagonal (``resolution``)
is near 1 where the data fix the annulus and near 0 where only the
regulariser does (no pattern power there, e.g. an axisymmetric outer disk).
The quoted errors do not include the smoothing bias.

Sampling and masks
------------------
Each slit is sampled on a grid aligned with the line of nodes, at
``x_center +- (i + 1/2) h`` along ``X`` and across the width, with steps of at
most ``pixel scale / oversample``; the maps enter through bilinear
interpolation (resampling on a grid aligned with the line of nodes; Zou et
al. 2019, ApJ 884, 23 find it slightly helps the standard method). A sample at
``+X`` and its mirror at ``-X`` then have the same radius and fall in the same
annulus, so the axisymmetric disk (``S`` even, ``V - V_sys`` odd in ``X``)
cancels annulus by annulus, not only over the whole slit. A sample is usable
when all pixels it draws on are valid and inside the map; when the slit set is
``symmetric`` (the default) a sample is kept only if its mirror image is
usable too (mirrored masking), which also truncates every slit to the same
extent on both sides of the minor axis, as in the single-pattern method.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import astropy.units as u
import numpy as np
from astropy.table import Table

from .coords import lon_to_sky, offsets_to_pixel, pixel_scale_arcsec
from .dataset import MapSet
from .errors import (DataContentError, DataQualityWarning, FitError,
                     GeometryError, MapMismatchError, SlitError)
from .geometry import DiskGeometry, kpc_per_arcsec
from .progress import CancelFlag, ProgressCallback, check_cancel, report
from .slits import SlitSet

__all__ = [
    "REGULARISATIONS",
    "RadialSettings",
    "RadialResult",
    "measure_radial",
    "radial_system",
    "RadialSystem",
    "solve_radial",
    "radial_table",
    "omega_curve",
]

#: Regularisation operators understood by :class:`RadialSettings`.
REGULARISATIONS = ("tikhonov-1st-difference", "tikhonov-2nd-difference", "none")

#: The lam grid searched by generalised cross-validation (dimensionless).
#: It starts at 1e-4: on (nearly) noiseless data GCV runs to the smallest lam,
#: where the triangular inverse amplifies sampling errors; on the synthetic
#: disks of :mod:`gyrometer.core.synthetic` the annulus values are stable for
#: 1e-4 <= lam <= 10 (see DEVELOPERS.md, "Radial pattern speeds").
_GCV_GRID = np.logspace(-4.0, 2.0, 25)

_METHOD = ("radial Tremaine-Weinberg (Merrifield, Rand & Meidt 2006; "
           "Meidt et al. 2008)")


@dataclass(frozen=True)
class RadialSettings:
    """Settings of the radial Tremaine-Weinberg measurement.

    Attributes
    ----------
    edges_arcsec : tuple of float or None
        Explicit annulus edges (disk-plane radius, arcsec, increasing). Takes
        precedence over ``n_annuli``.
    n_annuli : int or None
        Number of equal-width annuli from the centre to the outermost slit
        pixel. When both are None (default), annuli start at the innermost
        radius of each slit (pairs at +-Y share one), which makes the system
        triangular.
    regularisation : str
        One of :data:`REGULARISATIONS`: Tikhonov with the first- or
        second-difference operator, or none (plain weighted least squares).
    lam : float or "gcv"
        Dimensionless regularisation strength (see the module docstring), or
        ``"gcv"`` to choose it by generalised cross-validation.
    fit_vsys_offset : bool
        Fit an unknown correction ``dV`` to the adopted systemic velocity
        (one column of ones in the normalised system). Needs slits on both
        sides of the centre.
    n_mc : int
        Monte Carlo draws of the noise (0 = linear propagation only).
    oversample : int
        Samples per pixel scale along and across each slit (the maps are
        interpolated bilinearly at sample points aligned with the line of
        nodes and symmetric about the minor axis).
    """

    edges_arcsec: tuple[float, ...] | None = None
    n_annuli: int | None = None
    regularisation: str = "tikhonov-1st-difference"
    lam: float | str = "gcv"
    fit_vsys_offset: bool = False
    n_mc: int = 0
    oversample: int = 2

    def __post_init__(self) -> None:
        if self.edges_arcsec is not None:
            edges = tuple(float(e) for e in self.edges_arcsec)
            if (len(edges) < 2 or not all(math.isfinite(e) for e in edges)
                    or edges[0] < 0 or any(b <= a for a, b in zip(edges, edges[1:]))):
                raise SlitError("annulus edges must be at least two finite, "
                                "non-negative, strictly increasing radii",
                                keyword="edges_arcsec", value=self.edges_arcsec)
            object.__setattr__(self, "edges_arcsec", edges)
        if self.n_annuli is not None:
            if isinstance(self.n_annuli, bool) or int(self.n_annuli) != self.n_annuli \
                    or int(self.n_annuli) < 1:
                raise SlitError("the number of annuli must be a positive integer",
                                keyword="n_annuli", value=self.n_annuli)
            object.__setattr__(self, "n_annuli", int(self.n_annuli))
        if self.regularisation not in REGULARISATIONS:
            raise FitError(f"unknown regularisation {self.regularisation!r}",
                           keyword="regularisation", value=self.regularisation,
                           hint="choose one of " + ", ".join(REGULARISATIONS))
        if isinstance(self.lam, str):
            if self.lam != "gcv":
                raise FitError("lam must be a non-negative number or 'gcv'",
                               keyword="lam", value=self.lam)
        elif not (isinstance(self.lam, (int, float, np.floating, np.integer))
                  and math.isfinite(self.lam) and self.lam >= 0):
            raise FitError("lam must be a non-negative number or 'gcv'",
                           keyword="lam", value=self.lam)
        else:
            object.__setattr__(self, "lam", float(self.lam))
        if isinstance(self.n_mc, bool) or int(self.n_mc) != self.n_mc or self.n_mc < 0:
            raise FitError("n_mc must be a non-negative integer",
                           keyword="n_mc", value=self.n_mc)
        object.__setattr__(self, "n_mc", int(self.n_mc))
        if isinstance(self.oversample, bool) or int(self.oversample) != self.oversample \
                or not 1 <= int(self.oversample) <= 8:
            raise SlitError("oversample must be an integer from 1 to 8",
                            keyword="oversample", value=self.oversample)
        object.__setattr__(self, "oversample", int(self.oversample))


@dataclass(frozen=True, eq=False)
class RadialSystem:
    """The normalised linear system of the radial method (before solving).

    Attributes
    ----------
    edges_arcsec : numpy.ndarray, shape (n + 1,)
        Annulus edges, disk-plane radius, arcsec.
    kernel_arcsec : numpy.ndarray, shape (m, n)
        ``A_kj = sin i sum S X a / F_k`` over the samples of slit ``k`` in
        annulus ``j``, arcsec (so that ``A @ Omega`` is in km/s for Omega in
        km/s/arcsec).
    v_mean_kms : numpy.ndarray, shape (m,)
        ``<V>_k = sum S (V - V_sys) a / F_k``, km/s.
    v_err_kms : numpy.ndarray or None, shape (m,)
        1-sigma error of ``<V>_k`` from the error maps (None without them).
    flux : numpy.ndarray, shape (m,)
        ``F_k = sum S a`` (intensity unit x pixel).
    offset_arcsec : numpy.ndarray, shape (m,)
        ``Y`` of the slits used.
    slit_index : numpy.ndarray of int, shape (m,)
        Index of each row's slit in the slit set.
    n_samples : numpy.ndarray of int, shape (m,)
        Sample points used per slit (after masking).
    coverage : numpy.ndarray, shape (m,)
        Fraction of each slit's nominal sample points used, 0..1.
    """

    edges_arcsec: np.ndarray
    kernel_arcsec: np.ndarray
    v_mean_kms: np.ndarray
    v_err_kms: np.ndarray | None
    flux: np.ndarray
    offset_arcsec: np.ndarray
    slit_index: np.ndarray
    n_samples: np.ndarray
    coverage: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(int(n) for n in self.kernel_arcsec.shape)


@dataclass(frozen=True, eq=False)
class RadialResult:
    """Pattern speed against disk-plane radius.

    Attributes
    ----------
    edges_arcsec : numpy.ndarray, shape (n + 1,)
        Annulus edges (disk-plane radius), arcsec.
    omega_kms_arcsec, omega_err_kms_arcsec : numpy.ndarray, shape (n,)
        Pattern speed per annulus and its 1-sigma error, km/s/arcsec.
    omega_err_linear_kms_arcsec : numpy.ndarray, shape (n,)
        The linearly propagated error (equal to the reported error when no
        Monte Carlo was run).
    covariance : numpy.ndarray, shape (n, n)
        Covariance of the annulus values (linear propagation), (km/s/arcsec)**2.
    resolution : numpy.ndarray, shape (n,)
        Diagonal of the model resolution matrix: near 1 where the data fix the
        annulus, near 0 where only the regulariser does.
    averaging_kernels : numpy.ndarray, shape (n, n)
        Rows of the model resolution matrix (the averaging kernel of each
        annulus).
    system : RadialSystem
        The linear system solved.
    lam : float
        Dimensionless regularisation strength used.
    lam_method : str
        ``"gcv"``, ``"user"`` or ``"none"``.
    regularisation : str
        Operator used (one of :data:`REGULARISATIONS`).
    chi2 : float
        Weighted sum of squared residuals of the slit equations.
    dof : float
        Effective degrees of freedom, ``m - trace(H)``.
    residual_rms_kms : float
        Root-mean-square residual of the slit equations, km/s.
    vsys_offset_kms, vsys_offset_err_kms : float or None
        Fitted correction to add to the adopted systemic velocity.
    mean_omega_kms_arcsec, mean_omega_err_kms_arcsec : float
        The single pattern speed that the standard line fit through the same
        slits would give for this ``Omega(r)`` (kernel-weighted mean, see
        :func:`measure_radial`).
    geometry : DiskGeometry
    settings : RadialSettings
    error_method : str
        ``"linear"``, ``"linear (residual scatter)"`` or ``"monte carlo"``.
    mc_draws_kms_arcsec : numpy.ndarray or None, shape (n_mc, n)
    seed : int or None
        Seed of the generator used for the Monte Carlo, when known.
    warnings : tuple of str
    """

    edges_arcsec: np.ndarray
    omega_kms_arcsec: np.ndarray
    omega_err_kms_arcsec: np.ndarray
    omega_err_linear_kms_arcsec: np.ndarray
    covariance: np.ndarray
    resolution: np.ndarray
    averaging_kernels: np.ndarray
    system: RadialSystem
    lam: float
    lam_method: str
    regularisation: str
    chi2: float
    dof: float
    residual_rms_kms: float
    vsys_offset_kms: float | None
    vsys_offset_err_kms: float | None
    mean_omega_kms_arcsec: float
    mean_omega_err_kms_arcsec: float
    geometry: DiskGeometry
    settings: RadialSettings
    error_method: str
    mc_draws_kms_arcsec: np.ndarray | None = None
    seed: int | None = None
    warnings: tuple[str, ...] = ()

    # -- derived views ---------------------------------------------------
    @property
    def n_annuli(self) -> int:
        return int(self.omega_kms_arcsec.size)

    @property
    def kernel_shape(self) -> tuple[int, int]:
        """``(slits used, annuli)`` of the kernel matrix."""
        return self.system.shape

    @property
    def centres_arcsec(self) -> np.ndarray:
        """Mid radius of each annulus, arcsec."""
        return 0.5 * (self.edges_arcsec[:-1] + self.edges_arcsec[1:])

    @property
    def constrained(self) -> np.ndarray:
        """Annuli fixed mainly by the data (resolution >= 0.5)."""
        return self.resolution >= 0.5

    def _per_kpc(self, values):
        if self.geometry.distance_mpc is None:
            return None
        return np.asarray(values) / kpc_per_arcsec(self.geometry.distance_mpc)

    def _kpc(self, values):
        if self.geometry.distance_mpc is None:
            return None
        return np.asarray(values) * kpc_per_arcsec(self.geometry.distance_mpc)

    @property
    def edges_kpc(self) -> np.ndarray | None:
        return self._kpc(self.edges_arcsec)

    @property
    def centres_kpc(self) -> np.ndarray | None:
        return self._kpc(self.centres_arcsec)

    @property
    def omega_kms_kpc(self) -> np.ndarray | None:
        """Omega per annulus in km/s/kpc (None without a distance)."""
        return self._per_kpc(self.omega_kms_arcsec)

    @property
    def omega_err_kms_kpc(self) -> np.ndarray | None:
        return self._per_kpc(self.omega_err_kms_arcsec)

    @property
    def omega(self) -> u.Quantity:
        """Omega per annulus as a Quantity (km/s/kpc if a distance is set)."""
        if self.geometry.distance_mpc is None:
            return self.omega_kms_arcsec * (u.km / u.s / u.arcsec)
        return self.omega_kms_kpc * (u.km / u.s / u.kpc)

    @property
    def reduced_chi2(self) -> float:
        return self.chi2 / self.dof if self.dof > 0 else float("nan")


# ---------------------------------------------------------------------------
# Building the system
# ---------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class _SlitSamples:
    """Sample points of one slit and their bilinear pixel coefficients (private).

    ``corner`` (n_s, 4) holds flat pixel indices and ``coef`` (n_s, 4) the
    bilinear coefficients times the sample area in pixels, so that
    ``sum(coef * image.ravel()[corner])`` integrates ``image`` over the slit.
    """

    index: int
    offset_arcsec: float
    corner: np.ndarray
    coef: np.ndarray
    x_arcsec: np.ndarray
    r_arcsec: np.ndarray
    n_nominal: int

    @property
    def n_samples(self) -> int:
        return int(self.x_arcsec.size)


@dataclass(frozen=True, eq=False)
class _SlitOperator:
    """Pixel weights of one slit for the flux and for each annulus (private).

    ``F = w @ S[pix]``, ``int S u = w @ (S u)[pix]`` and
    ``A_j F / sin i = xw[j] @ S[pix]``.
    """

    index: int
    offset_arcsec: float
    pix: np.ndarray
    w: np.ndarray
    xw: np.ndarray


def _check_maps(maps: MapSet) -> None:
    if not isinstance(maps, MapSet):
        raise DataContentError("the radial method needs a MapSet (intensity "
                               "and velocity maps)", value=type(maps).__name__)
    for name in ("velocity_kms", "intensity_err", "velocity_err_kms"):
        other = getattr(maps, name)
        if other is not None and other.shape != maps.intensity.shape:
            raise MapMismatchError(
                f"the {name} map and the intensity map differ in shape",
                path=_map_path(maps), keyword=name,
                value=(other.shape, maps.intensity.shape))


def _map_path(maps: MapSet) -> str | None:
    return maps.provenance[0].path if maps.provenance else None


def _valid_mask(maps: MapSet) -> np.ndarray:
    valid = np.isfinite(maps.intensity) & np.isfinite(maps.velocity_kms)
    for extra in (maps.intensity_err, maps.velocity_err_kms):
        if extra is not None:
            valid &= np.isfinite(extra)
    return valid


def _slit_samples(maps: MapSet, geometry: DiskGeometry, slits: SlitSet,
                  oversample: int) -> list[_SlitSamples]:
    """Sample every slit on a grid aligned with the line of nodes.

    Samples sit at ``x_center +- (i + 1/2) h_x`` and ``Y + (l + 1/2) h_y -
    width/2`` with steps of at most ``pixel scale / oversample``; values are
    bilinear interpolations of the pixel maps. A sample is usable when every
    pixel it draws on is valid and inside the map; in a symmetric slit set a
    sample is kept only when its mirror image ``X -> 2 x_center - X`` is
    usable too (mirrored masking and symmetric truncation).
    """
    ny, nx = maps.shape
    scale = pixel_scale_arcsec(maps.wcs)
    step = scale / oversample
    valid = _valid_mask(maps)
    layouts, xs, ys = [], [], []
    for slit in slits:
        n_half = max(1, math.ceil(slit.half_length_arcsec / step - 1e-9))
        n_w = max(1, math.ceil(slit.width_arcsec / step - 1e-9))
        hx = slit.half_length_arcsec / n_half
        hy = slit.width_arcsec / n_w
        half = (np.arange(n_half) + 0.5) * hx
        x = slit.x_center_arcsec + np.concatenate([-half[::-1], half])
        y = slit.offset_arcsec + (np.arange(n_w) + 0.5 - 0.5 * n_w) * hy
        xx, yy = np.meshgrid(x, y)
        layouts.append((xx.shape, hx * hy / scale ** 2))
        xs.append(xx.ravel())
        ys.append(yy.ravel())
    x_all = np.concatenate(xs)
    y_all = np.concatenate(ys)
    east, north = lon_to_sky(x_all, y_all, geometry.pa_deg)
    px, py = offsets_to_pixel(maps.wcs, geometry.ra_deg, geometry.dec_deg,
                              east, north)
    i0 = np.floor(px).astype(np.int64)
    j0 = np.floor(py).astype(np.int64)
    fx = px - i0
    fy = py - j0
    ci = np.stack([i0, i0 + 1, i0, i0 + 1], axis=1)
    cj = np.stack([j0, j0, j0 + 1, j0 + 1], axis=1)
    coef = np.stack([(1 - fx) * (1 - fy), fx * (1 - fy), (1 - fx) * fy,
                     fx * fy], axis=1)
    inside = (ci >= 0) & (ci < nx) & (cj >= 0) & (cj < ny)
    ci_c = np.clip(ci, 0, nx - 1)
    cj_c = np.clip(cj, 0, ny - 1)
    good = (inside & valid[cj_c, ci_c]) | (coef <= 1e-12)
    usable = np.all(good, axis=1) & np.all(np.isfinite(coef), axis=1)
    corner = cj_c * nx + ci_c
    coef = np.where(coef <= 1e-12, 0.0, coef)
    cos_i = geometry.cos_i
    out, start = [], 0
    for k, (slit, (shape, area)) in enumerate(zip(slits, layouts)):
        n = shape[0] * shape[1]
        sl = slice(start, start + n)
        start += n
        ok = usable[sl].reshape(shape)
        if slits.symmetric:
            ok = ok & ok[:, ::-1]
        ok = ok.ravel()
        x = x_all[sl][ok]
        y = y_all[sl][ok]
        out.append(_SlitSamples(
            index=k, offset_arcsec=slit.offset_arcsec,
            corner=corner[sl][ok], coef=coef[sl][ok] * area, x_arcsec=x,
            r_arcsec=np.hypot(x, y / cos_i), n_nominal=n))
    return out


def _slit_edges(samples: list[_SlitSamples], slits: SlitSet,
                cos_i: float) -> np.ndarray:
    """Annulus edges at the innermost disk radius of each group of slits.

    Slits whose ``|Y|`` differ by less than half the narrowest width form a
    group (a pair at +-Y). The group's edge is ``min (|Y| - width/2) / cos i``
    (0 for a slit across the centre), so no sample of the group lies inside
    it; the last edge is just outside the outermost sample.
    """
    used = [s for s in samples if s.n_samples]
    widths = np.array([slits.slits[s.index].width_arcsec for s in used])
    absy = np.array([abs(s.offset_arcsec) for s in used])
    inner = np.maximum(absy - 0.5 * widths, 0.0) / cos_i
    tol = 0.5 * float(np.min(widths))
    order = np.argsort(absy, kind="stable")
    edges, group_y = [], None
    for idx in order:
        if group_y is None or absy[idx] - group_y > tol:
            edges.append(inner[idx])
            group_y = absy[idx]
        else:
            edges[-1] = min(edges[-1], inner[idx])
    r_max = max(float(np.max(s.r_arcsec)) for s in used)
    edges.append(r_max * (1.0 + 1e-9) + 1e-9)
    return np.unique(np.array(edges))


def _annulus_index(r: np.ndarray, edges: np.ndarray) -> np.ndarray:
    j = np.searchsorted(edges, r, side="right") - 1
    return np.clip(j, 0, edges.size - 2)


def _operators(samples: list[_SlitSamples], edges: np.ndarray
               ) -> list[_SlitOperator]:
    """Aggregate each slit's samples into pixel weights per annulus."""
    n = edges.size - 1
    out = []
    for s in samples:
        pix, inv = np.unique(s.corner.ravel(), return_inverse=True)
        inv = inv.ravel()
        c = s.coef.ravel()
        w = np.bincount(inv, weights=c, minlength=pix.size)
        j = np.repeat(_annulus_index(s.r_arcsec, edges), 4)
        xc = (s.coef * s.x_arcsec[:, None]).ravel()
        xw = np.bincount(j * pix.size + inv, weights=xc,
                         minlength=n * pix.size).reshape(n, pix.size)
        out.append(_SlitOperator(s.index, s.offset_arcsec, pix, w, xw))
    return out


def _rows(ops: list[_SlitOperator], intensity: np.ndarray, velocity: np.ndarray,
          vsys_kms: float, sin_i: float):
    """Kernel, <V> and flux of each slit for given maps (flat arrays)."""
    n = ops[0].xw.shape[0]
    kernel = np.zeros((len(ops), n))
    v_mean = np.zeros(len(ops))
    flux = np.zeros(len(ops))
    for row, op in enumerate(ops):
        s = intensity[op.pix]
        f = float(op.w @ s)
        flux[row] = f
        if f == 0:
            continue
        v_mean[row] = float(op.w @ (s * (velocity[op.pix] - vsys_kms))) / f
        kernel[row] = sin_i * (op.xw @ s) / f
    return kernel, v_mean, flux


def _v_errors(ops: list[_SlitOperator], maps: MapSet, vsys_kms: float,
              v_mean: np.ndarray, flux: np.ndarray) -> np.ndarray | None:
    """Linear 1-sigma error of ``<V>_k`` from the intensity and velocity errors.

    ``<V> = sum w S u / sum w S`` with ``u = V - V_sys``, so
    ``d<V>/dS_p = w_p (u_p - <V>) / F`` and ``d<V>/dV_p = w_p S_p / F``
    (pixels independent; interpolation correlations are carried by ``w``).
    """
    if maps.intensity_err is None and maps.velocity_err_kms is None:
        return None
    s_all = maps.intensity.ravel()
    v_all = maps.velocity_kms.ravel()
    out = np.zeros(len(ops))
    for row, op in enumerate(ops):
        var = 0.0
        if maps.intensity_err is not None:
            ds = op.w * (v_all[op.pix] - vsys_kms - v_mean[row]) / flux[row]
            var += float(np.sum((ds * maps.intensity_err.ravel()[op.pix]) ** 2))
        if maps.velocity_err_kms is not None:
            dv = op.w * s_all[op.pix] / flux[row]
            var += float(np.sum((dv * maps.velocity_err_kms.ravel()[op.pix]) ** 2))
        out[row] = math.sqrt(var)
    return out


def _build(maps: MapSet, geometry: DiskGeometry, slits: SlitSet,
           settings: RadialSettings):
    """Samples, operators and the normalised system (shared with the Monte Carlo)."""
    _check_maps(maps)
    if not isinstance(slits, SlitSet) or len(slits) == 0:
        raise SlitError("the slit set is empty", hint="add slits across the bar")
    samples = _slit_samples(maps, geometry, slits, settings.oversample)
    s_flat = maps.intensity.ravel()
    usable = []
    for s in samples:
        if s.n_samples == 0:
            continue
        flux = float(np.sum(s.coef * s_flat[s.corner]))
        if flux > 0:
            usable.append(s)
    if not usable:
        raise SlitError("no slit holds valid data with positive flux",
                        path=_map_path(maps),
                        hint="check the centre, the position angle and the "
                             "slit offsets")
    if settings.edges_arcsec is not None:
        edges = np.asarray(settings.edges_arcsec, dtype=float)
    elif settings.n_annuli is not None:
        r_max = max(float(np.max(s.r_arcsec)) for s in usable)
        edges = np.linspace(0.0, r_max * (1.0 + 1e-9) + 1e-9,
                            settings.n_annuli + 1)
    else:
        edges = _slit_edges(usable, slits, geometry.cos_i)
    ops = _operators(usable, edges)
    kernel, v_mean, flux = _rows(ops, s_flat, maps.velocity_kms.ravel(),
                                 geometry.vsys_kms, geometry.sin_i)
    v_err = _v_errors(ops, maps, geometry.vsys_kms, v_mean, flux)
    system = RadialSystem(
        edges_arcsec=edges, kernel_arcsec=kernel, v_mean_kms=v_mean,
        v_err_kms=v_err, flux=flux,
        offset_arcsec=np.array([s.offset_arcsec for s in usable]),
        slit_index=np.array([s.index for s in usable], dtype=int),
        n_samples=np.array([s.n_samples for s in usable], dtype=int),
        coverage=np.array([s.n_samples / s.n_nominal for s in usable]))
    return system, ops


def radial_system(maps: MapSet, geometry: DiskGeometry, slits: SlitSet,
                  settings: RadialSettings | None = None) -> RadialSystem:
    """Build the normalised linear system ``<V>_k = sum_j A_kj Omega_j``.

    Parameters
    ----------
    maps : MapSet
        Intensity and velocity maps (NaN = invalid); error maps are used for
        the weights when present.
    geometry : DiskGeometry
        Centre, PA, inclination and adopted V_sys.
    slits : SlitSet
        Slits parallel to the line of nodes; place them on both sides of the
        centre.
    settings : RadialSettings, optional

    Returns
    -------
    RadialSystem

    Raises
    ------
    SlitError
        The slit set is empty or no slit holds valid data.
    """
    return _build(maps, geometry, slits, settings or RadialSettings())[0]


# ---------------------------------------------------------------------------
# Solving
# ---------------------------------------------------------------------------

def _difference_operator(n: int, order: int) -> np.ndarray:
    """``order``-th forward-difference matrix, shape (n - order, n)."""
    if n <= order:
        return np.zeros((0, n))
    return np.diff(np.eye(n), n=order, axis=0)


@dataclass(frozen=True, eq=False)
class _Solution:
    theta: np.ndarray
    hat_trace: float
    chi2: float
    gain: np.ndarray          # theta = gain @ (b / sigma)
    resolution: np.ndarray    # (p, p) model resolution matrix


def _design(kernel: np.ndarray, fit_vsys: bool) -> np.ndarray:
    if fit_vsys:
        return np.column_stack([kernel, np.ones(kernel.shape[0])])
    return kernel


def _penalty(n: int, p: int, regularisation: str) -> np.ndarray:
    """Regularisation operator ``L`` padded to ``p`` columns (dV not penalised)."""
    order = {"tikhonov-1st-difference": 1, "tikhonov-2nd-difference": 2}.get(
        regularisation)
    if order is None:
        return np.zeros((0, p))
    diff = _difference_operator(n, order)
    out = np.zeros((diff.shape[0], p))
    out[:, :n] = diff
    return out


def _solve(design: np.ndarray, b: np.ndarray, sigma: np.ndarray,
           op: np.ndarray, n: int, lam: float) -> _Solution:
    """Weighted Tikhonov least squares.

    Minimises ``|(design theta - b) / sigma|**2 + mu |op theta|**2`` with
    ``mu = lam trace(A^T W A) / trace(L^T L)`` through the pseudo-inverse of
    the stacked matrix ``[design / sigma; sqrt(mu) op]`` (SVD; avoids
    squaring the condition number in the normal equations).
    """
    aw = design / sigma[:, None]
    bw = b / sigma
    m = aw.shape[0]
    norm_l = float(np.sum(op ** 2))
    mu = 0.0
    if lam > 0 and norm_l > 0:
        mu = lam * float(np.sum(aw[:, :n] ** 2)) / norm_l
    stacked = np.vstack([aw, math.sqrt(mu) * op]) if mu > 0 else aw
    gain = np.linalg.pinv(stacked, rcond=1e-12)[:, :m]
    theta = gain @ bw
    resid = bw - aw @ theta
    hat_trace = float(np.trace(aw @ gain))
    return _Solution(theta, hat_trace, float(resid @ resid), gain, gain @ aw)


def _gcv(design, b, sigma, op, n) -> float:
    """lam minimising the generalised cross-validation function (Golub et al. 1979)."""
    m = design.shape[0]
    best, best_lam = np.inf, float(_GCV_GRID[0])
    for lam in _GCV_GRID:
        sol = _solve(design, b, sigma, op, n, float(lam))
        denom = (m - sol.hat_trace) ** 2
        if denom <= (1e-6 * m) ** 2:
            continue
        score = m * sol.chi2 / denom
        if score < best * (1.0 - 1e-9):
            best, best_lam = score, float(lam)
    return best_lam


def solve_radial(system: RadialSystem, settings: RadialSettings | None = None):
    """Solve a :class:`RadialSystem`; returns ``(theta, covariance, info)``.

    ``theta`` holds the annulus values (km/s/arcsec) followed by the V_sys
    correction (km/s) when ``settings.fit_vsys_offset``. ``info`` is a dict
    with ``lam``, ``lam_method``, ``chi2``, ``dof``, ``resolution`` (full
    model resolution matrix), ``sigma`` (the per-slit errors used) and
    ``error_method``. This is the lower-level half of :func:`measure_radial`.
    """
    settings = settings or RadialSettings()
    kernel, b = system.kernel_arcsec, system.v_mean_kms
    m, n = kernel.shape
    design = _design(kernel, settings.fit_vsys_offset)
    p = design.shape[1]
    if m < p and settings.regularisation == "none":
        raise FitError(f"{m} usable slits cannot fix {p} unknowns without "
                       "regularisation", value=(m, p),
                       hint="add slits, use fewer annuli or switch regularisation on")
    if settings.fit_vsys_offset and np.all(system.offset_arcsec >= 0) | np.all(
            system.offset_arcsec <= 0):
        raise FitError("fitting a systemic-velocity correction needs slits on "
                       "both sides of the centre", keyword="fit_vsys_offset",
                       hint="add slits at negative and positive offsets")
    op = _penalty(n, p, settings.regularisation)
    scaled = system.v_err_kms is not None
    sigma = system.v_err_kms.copy() if scaled else np.ones(m)
    if scaled and np.any(~(sigma > 0)):
        positive = sigma[sigma > 0]
        sigma[~(sigma > 0)] = positive.min() if positive.size else 1.0
    if op.shape[0] == 0:
        lam, lam_method = 0.0, "none"
    elif settings.lam == "gcv":
        lam, lam_method = _gcv(design, b, sigma, op, n), "gcv"
    else:
        lam, lam_method = float(settings.lam), "user"
    sol = _solve(design, b, sigma, op, n, lam)
    dof = m - sol.hat_trace
    cov = sol.gain @ sol.gain.T          # unit errors on b / sigma
    error_method = "linear"
    if not scaled:
        # sigma_k from the residual scatter (common practice for unweighted LS)
        s2 = sol.chi2 / dof if dof > 1e-6 else float("nan")
        cov = cov * s2
        sigma = sigma * math.sqrt(s2)
        error_method = "linear (residual scatter)"
    resid_kms = b - design @ sol.theta
    info = dict(lam=lam, lam_method=lam_method,
                chi2=float(np.sum((resid_kms / sigma) ** 2)) if np.all(sigma > 0)
                else 0.0,
                rms_kms=float(np.sqrt(np.mean(resid_kms ** 2))),
                dof=float(dof), resolution=sol.resolution, sigma=sigma,
                error_method=error_method)
    return sol.theta, cov, info


def _kernel_weights(system: RadialSystem, sigma: np.ndarray,
                    fit_vsys: bool) -> np.ndarray:
    """Weights c_j with sum_j c_j Omega_j = the single-pattern slope (derived).

    For ``<V>_k = sum_j A_kj Omega_j`` the weighted least-squares slope of
    ``<V>`` against ``a_k = sum_j A_kj = sin i <X>_k`` (with an intercept when
    ``fit_vsys``) is ``sum_j c_j Omega_j``, ``c_j = sum_k w_k a'_k A_kj /
    sum_k w_k a'_k a_k``, ``a'`` the (weighted-mean-subtracted) lever arm.
    """
    a = system.kernel_arcsec.sum(axis=1)
    w = 1.0 / sigma ** 2
    a_c = a - np.sum(w * a) / np.sum(w) if fit_vsys else a
    denom = np.sum(w * a_c * a)
    if denom == 0:
        return np.zeros(system.kernel_arcsec.shape[1])
    return (w * a_c) @ system.kernel_arcsec / denom


def measure_radial(maps: MapSet, geometry: DiskGeometry, slits: SlitSet,
                   settings: RadialSettings | None = None, *,
                   rng: np.random.Generator | None = None,
                   progress: ProgressCallback | None = None,
                   cancel: CancelFlag | None = None,
                   warn: bool = True) -> RadialResult:
    """Measure the pattern speed in annuli of disk-plane radius.

    Builds the system of :func:`radial_system` and solves it as described in
    the module docstring (Merrifield, Rand & Meidt 2006; Meidt et al. 2008).

    Parameters
    ----------
    maps : MapSet
        Tracer intensity and line-of-sight velocity (km/s), with error maps
        for weights and uncertainties.
    geometry : DiskGeometry
        Centre, PA, inclination and V_sys (km/s); the distance, if set, gives
        results in km/s/kpc.
    slits : SlitSet
        Slits on both sides of the centre (the outermost ones fix the outer
        annuli, so they must reach where the pattern fades).
    settings : RadialSettings, optional
        Annuli, regulariser, lam, V_sys correction, Monte Carlo draws.
    rng : numpy.random.Generator, optional
        Random generator for the Monte Carlo (needed when ``settings.n_mc > 0``
        unless a fresh unseeded one is acceptable).
    progress : callable, optional
        ``progress(done, total, stage)``.
    cancel : object with ``is_set()``, optional
        Raises :class:`~gyrometer.core.errors.Cancelled` when set.
    warn : bool
        Also issue the diagnostics as :class:`DataQualityWarning`; they are
        always stored in :attr:`RadialResult.warnings`.

    Returns
    -------
    RadialResult
        ``mean_omega_kms_arcsec`` is ``sum_j c_j Omega_j`` with the weights of
        the standard least-squares slope through the same slits (derived:
        with ``sum_j A_kj = sin i <X>_k`` the slope of ``<V>`` against
        ``<X>`` is exactly this mean), so it is directly comparable with the
        single-pattern result.
    """
    settings = settings or RadialSettings()
    if not isinstance(geometry, DiskGeometry):
        raise GeometryError("the radial method needs a DiskGeometry",
                            value=type(geometry).__name__)
    total = 2 + settings.n_mc
    report(progress, 0, total, "radial: slit kernels")
    check_cancel(cancel, "radial pattern speeds")
    system, ops = _build(maps, geometry, slits, settings)
    m, n = system.shape
    notes: list[str] = []
    if m < len(slits):
        notes.append(f"{len(slits) - m} of {len(slits)} slits hold no valid data "
                     "and were left out")
    report(progress, 1, total, "radial: solving")
    check_cancel(cancel, "radial pattern speeds")
    theta, cov, info = solve_radial(system, settings)
    resolution = info["resolution"]
    omega = theta[:n]
    err_lin = np.sqrt(np.clip(np.diag(cov)[:n], 0.0, None))
    err = err_lin
    error_method = info["error_method"]
    draws = None
    seed = None
    has_errors = maps.intensity_err is not None or maps.velocity_err_kms is not None
    if settings.n_mc > 0:
        if not has_errors:
            notes.append("no error maps: Monte Carlo skipped, errors from the "
                         "residual scatter")
        else:
            if rng is None:
                rng = np.random.default_rng()
            seed = _seed_of(rng)
            sigma_mc = (system.v_err_kms if system.v_err_kms is not None
                        else np.ones(m))
            sigma_mc = np.where(sigma_mc > 0, sigma_mc, np.max(sigma_mc) or 1.0)
            draws = _monte_carlo(maps, geometry, ops, system, settings,
                                 info["lam"], sigma_mc, rng, progress, cancel,
                                 total)
            err = np.std(draws[:, :n], axis=0, ddof=1)
            error_method = "monte carlo"
    if info["lam_method"] == "gcv" and info["lam"] >= _GCV_GRID[-1]:
        notes.append("cross-validation chose the strongest smoothing: at this "
                     "noise level the data do not distinguish Omega(r) from a "
                     "single pattern speed")
    weak = resolution.diagonal()[:n] < 0.5
    if np.any(weak):
        notes.append(f"{int(weak.sum())} of {n} annuli are set mainly by the "
                     "regulariser (resolution < 0.5): little pattern power there")
    c = _kernel_weights(system, info["sigma"] if np.all(info["sigma"] > 0)
                        else np.ones(m), settings.fit_vsys_offset)
    mean = float(c @ omega)
    mean_err = float(math.sqrt(max(c @ cov[:n, :n] @ c, 0.0)))
    if draws is not None:
        mean_err = float(np.std(draws[:, :n] @ c, ddof=1))
    if warn:
        for note in notes:
            warnings.warn(note, DataQualityWarning, stacklevel=2)
    vsys_off = vsys_err = None
    if settings.fit_vsys_offset:
        vsys_off = float(theta[n])
        vsys_err = float(math.sqrt(max(cov[n, n], 0.0)))
        if draws is not None:
            vsys_err = float(np.std(draws[:, n], ddof=1))
    report(progress, total, total, "radial: done")
    return RadialResult(
        edges_arcsec=system.edges_arcsec, omega_kms_arcsec=omega,
        omega_err_kms_arcsec=err, omega_err_linear_kms_arcsec=err_lin,
        covariance=cov[:n, :n], resolution=resolution.diagonal()[:n].copy(),
        averaging_kernels=resolution[:n, :n].copy(), system=system,
        lam=float(info["lam"]), lam_method=info["lam_method"],
        regularisation=settings.regularisation, chi2=float(info["chi2"]),
        dof=float(info["dof"]), residual_rms_kms=float(info["rms_kms"]),
        vsys_offset_kms=vsys_off,
        vsys_offset_err_kms=vsys_err, mean_omega_kms_arcsec=mean,
        mean_omega_err_kms_arcsec=mean_err, geometry=geometry,
        settings=settings, error_method=error_method,
        mc_draws_kms_arcsec=draws, seed=seed, warnings=tuple(notes))


def _seed_of(rng: np.random.Generator) -> int | None:
    seq = getattr(rng.bit_generator, "seed_seq", None)
    entropy = getattr(seq, "entropy", None)
    return int(entropy) if isinstance(entropy, (int, np.integer)) else None


def _monte_carlo(maps: MapSet, geometry: DiskGeometry, ops: list[_SlitOperator],
                 system: RadialSystem, settings: RadialSettings, lam: float,
                 sigma: np.ndarray, rng: np.random.Generator, progress,
                 cancel, total: int) -> np.ndarray:
    """Perturb the maps by their errors and re-solve with ``lam`` held fixed.

    Both ``A`` and ``<V>`` are recomputed from the perturbed maps, so the
    correlated errors of the kernel and of the data enter (Monte Carlo on
    noise; Aguerri et al. 2015, A&A 576, A102).
    """
    n = system.shape[1]
    op = _penalty(n, n + int(settings.fit_vsys_offset), settings.regularisation)
    s0 = maps.intensity.ravel()
    v0 = maps.velocity_kms.ravel()
    s_err = None if maps.intensity_err is None else np.nan_to_num(
        maps.intensity_err.ravel())
    v_err = None if maps.velocity_err_kms is None else np.nan_to_num(
        maps.velocity_err_kms.ravel())
    draws = np.empty((settings.n_mc, op.shape[1]))
    for t in range(settings.n_mc):
        check_cancel(cancel, "radial Monte Carlo")
        s = s0 if s_err is None else s0 + s_err * rng.standard_normal(s0.size)
        v = v0 if v_err is None else v0 + v_err * rng.standard_normal(v0.size)
        kernel, v_mean, _ = _rows(ops, s, v, geometry.vsys_kms, geometry.sin_i)
        design = _design(kernel, settings.fit_vsys_offset)
        draws[t] = _solve(design, v_mean, sigma, op, n, lam).theta
        report(progress, 2 + t, total, "radial: Monte Carlo")
    return draws


# ---------------------------------------------------------------------------
# Tables and curves
# ---------------------------------------------------------------------------

def radial_table(result: RadialResult) -> Table:
    """Per-annulus results as an astropy Table with units.

    Columns: ``annulus``, ``r_in``, ``r_out``, ``r_mid`` (arcsec, disk plane),
    ``Omega_p``, ``e_Omega_p`` (km/s/arcsec), ``resolution``, ``constrained``;
    with a distance also ``r_in_kpc``, ``r_out_kpc``, ``r_mid_kpc`` (kpc) and
    ``Omega_p_kpc``, ``e_Omega_p_kpc`` (km/s/kpc). ``meta`` records the method,
    the regularisation, lam and how it was chosen, chi2, dof, the kernel
    shape, the error method, the V_sys correction and the geometry.
    """
    n = result.n_annuli
    kms_arcsec = u.km / u.s / u.arcsec
    table = Table()
    table["annulus"] = np.arange(n)
    table["r_in"] = result.edges_arcsec[:-1] * u.arcsec
    table["r_out"] = result.edges_arcsec[1:] * u.arcsec
    table["r_mid"] = result.centres_arcsec * u.arcsec
    table["Omega_p"] = result.omega_kms_arcsec * kms_arcsec
    table["e_Omega_p"] = result.omega_err_kms_arcsec * kms_arcsec
    if result.geometry.distance_mpc is not None:
        table["r_in_kpc"] = result.edges_kpc[:-1] * u.kpc
        table["r_out_kpc"] = result.edges_kpc[1:] * u.kpc
        table["r_mid_kpc"] = result.centres_kpc * u.kpc
        table["Omega_p_kpc"] = result.omega_kms_kpc * (u.km / u.s / u.kpc)
        table["e_Omega_p_kpc"] = result.omega_err_kms_kpc * (u.km / u.s / u.kpc)
    table["resolution"] = result.resolution
    table["constrained"] = result.constrained
    descriptions = {
        "annulus": "Annulus index, inside out",
        "r_in": "Inner disk-plane radius of the annulus",
        "r_out": "Outer disk-plane radius of the annulus",
        "r_mid": "Mid radius of the annulus",
        "Omega_p": "Pattern speed in the annulus",
        "e_Omega_p": f"1-sigma error of Omega_p ({result.error_method})",
        "r_in_kpc": "Inner disk-plane radius of the annulus",
        "r_out_kpc": "Outer disk-plane radius of the annulus",
        "r_mid_kpc": "Mid radius of the annulus",
        "Omega_p_kpc": "Pattern speed in the annulus",
        "e_Omega_p_kpc": f"1-sigma error of Omega_p ({result.error_method})",
        "resolution": "Diagonal of the model resolution matrix",
        "constrained": "Fixed mainly by the data (resolution >= 0.5)",
    }
    for name in table.colnames:
        table[name].description = descriptions[name]
    g = result.geometry
    st = result.settings
    annuli = ("explicit edges" if st.edges_arcsec is not None else
              f"{st.n_annuli} equal-width annuli" if st.n_annuli is not None else
              "one annulus per slit pair, inner edge (|Y| - width/2) / cos i")
    table.meta.update({
        "method": _METHOD,
        "annuli": annuli,
        "regularisation": result.regularisation,
        "lam": result.lam,
        "lam_method": result.lam_method,
        "chi2": result.chi2,
        "dof": result.dof,
        "kernel_shape": list(result.kernel_shape),
        "error_method": result.error_method,
        "vsys_offset_kms": result.vsys_offset_kms,
        "vsys_offset_err_kms": result.vsys_offset_err_kms,
        "mean_omega_kms_arcsec": result.mean_omega_kms_arcsec,
        "mean_omega_err_kms_arcsec": result.mean_omega_err_kms_arcsec,
        "n_mc": result.settings.n_mc,
        "seed": result.seed,
        "ra_deg": g.ra_deg, "dec_deg": g.dec_deg, "pa_deg": g.pa_deg,
        "inc_deg": g.inc_deg, "vsys_kms": g.vsys_kms,
        "distance_mpc": g.distance_mpc,
    })
    return table


def omega_curve(result: RadialResult, *, physical: bool = True):
    """Step arrays of Omega(r) for plotting.

    Parameters
    ----------
    result : RadialResult
    physical : bool
        Radii in kpc and Omega in km/s/kpc when a distance is known (default);
        otherwise (or when False) arcsec and km/s/arcsec.

    Returns
    -------
    r, omega, omega_low, omega_high : astropy.units.Quantity
        Each of length ``2 n``: every annulus contributes its inner and outer
        edge with its value, so ``plot(r, omega)`` draws the step curve and
        ``fill_between(r, omega_low, omega_high)`` its 1-sigma band.
    """
    edges = result.edges_arcsec
    r = np.column_stack([edges[:-1], edges[1:]]).ravel()
    om = np.repeat(result.omega_kms_arcsec, 2)
    err = np.repeat(result.omega_err_kms_arcsec, 2)
    r_unit, om_unit = u.arcsec, u.km / u.s / u.arcsec
    if physical and result.geometry.distance_mpc is not None:
        scale = kpc_per_arcsec(result.geometry.distance_mpc)
        r, om, err = r * scale, om / scale, err / scale
        r_unit, om_unit = u.kpc, u.km / u.s / u.kpc
    return r * r_unit, om * om_unit, (om - err) * om_unit, (om + err) * om_unit
