"""Result data classes of the Tremaine-Weinberg measurement.

Frozen, plain containers: the engine fills them, the app, the command line
and the exporters read them. Per-slit quantities are arrays with one entry
per slit, in the order of the :class:`~gyrometer.core.slits.SlitSet`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import astropy.units as u
import numpy as np

from .geometry import DiskGeometry, kpc_per_arcsec

__all__ = [
    "SlitIntegrals",
    "LineFit",
    "TWMeasurement",
    "BudgetTerm",
    "UncertaintyBudget",
    "ConvergenceCurves",
    "PASensitivity",
    "KMS_PER_ARCSEC",
    "KMS_PER_KPC",
]

KMS_PER_ARCSEC = u.km / u.s / u.arcsec
KMS_PER_KPC = u.km / u.s / u.kpc


@dataclass(frozen=True, eq=False)
class SlitIntegrals:
    """Normalised Tremaine-Weinberg integrals of each slit.

    Attributes
    ----------
    offset_arcsec : numpy.ndarray
        Slit offset Y from the centre, perpendicular to the line of nodes.
    x_mean_arcsec, x_err_arcsec : numpy.ndarray
        ``<X> = int S X dX / int S dX`` and its 1-sigma error.
    v_mean_kms, v_err_kms : numpy.ndarray
        ``<V> = int S (V - Vsys) dX / int S dX`` and its 1-sigma error.
    xv_corr : numpy.ndarray
        Correlation coefficient of the errors of ``<X>`` and ``<V>`` (both
        are weighted by the same surface brightness).
    flux : numpy.ndarray
        ``int S dX`` over the slit (intensity unit x pixel area).
    flux_err : numpy.ndarray
        Its 1-sigma error.
    n_pixels : numpy.ndarray
        Number of pixels with non-zero weight used.
    coverage : numpy.ndarray
        Fraction of the slit's nominal area with valid data, 0..1.
    truncated : numpy.ndarray of bool
        True where the field edge or the mask cut the slit.
    half_length_used_arcsec : numpy.ndarray
        Half-length actually integrated (after symmetric truncation).
    """

    offset_arcsec: np.ndarray
    x_mean_arcsec: np.ndarray
    x_err_arcsec: np.ndarray
    v_mean_kms: np.ndarray
    v_err_kms: np.ndarray
    xv_corr: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    n_pixels: np.ndarray
    coverage: np.ndarray
    truncated: np.ndarray
    half_length_used_arcsec: np.ndarray

    @property
    def n_slits(self) -> int:
        return int(np.size(self.offset_arcsec))


@dataclass(frozen=True)
class LineFit:
    """A straight line ``y = slope x + intercept`` with errors on both axes.

    Attributes
    ----------
    slope, intercept : float
    slope_err, intercept_err : float
        1-sigma errors.
    covariance : float
        Covariance of slope and intercept.
    chi2 : float
        Weighted sum of squared residuals at the solution.
    dof : int
        Degrees of freedom (points - 2).
    method : str
        Name and citation of the regression used.
    """

    slope: float
    intercept: float
    slope_err: float
    intercept_err: float
    covariance: float
    chi2: float
    dof: int
    method: str

    @property
    def reduced_chi2(self) -> float:
        return self.chi2 / self.dof if self.dof > 0 else float("nan")


@dataclass(frozen=True, eq=False)
class TWMeasurement:
    """One Tremaine-Weinberg pattern-speed measurement.

    ``Omega_p sin i`` is the fitted slope of ``<V>`` against ``<X>``
    (Tremaine & Weinberg 1984; fit across slits as in Merrifield & Kuijken
    1995).

    Attributes
    ----------
    integrals : SlitIntegrals
    fit : LineFit
    used : numpy.ndarray of bool
        Slits that entered the fit.
    geometry : DiskGeometry
    route : str
        ``"maps"``, ``"cube"`` or ``"absorption"``.
    omega_p_kms_arcsec, omega_p_err_kms_arcsec : float
        Pattern speed and its fit-only error, km/s/arcsec.
    warnings : tuple of str
        Diagnostics raised while measuring (also issued as Python warnings).
    """

    integrals: SlitIntegrals
    fit: LineFit
    used: np.ndarray
    geometry: DiskGeometry
    route: str
    omega_p_kms_arcsec: float
    omega_p_err_kms_arcsec: float
    warnings: tuple[str, ...] = ()

    @property
    def omega_p_kms_kpc(self) -> float | None:
        if self.geometry.distance_mpc is None:
            return None
        return self.omega_p_kms_arcsec / kpc_per_arcsec(self.geometry.distance_mpc)

    @property
    def omega_p_err_kms_kpc(self) -> float | None:
        if self.geometry.distance_mpc is None:
            return None
        return self.omega_p_err_kms_arcsec / kpc_per_arcsec(self.geometry.distance_mpc)

    @property
    def omega_p(self) -> u.Quantity:
        """Pattern speed as a Quantity (km/s/kpc if a distance is set)."""
        if self.geometry.distance_mpc is None:
            return self.omega_p_kms_arcsec * KMS_PER_ARCSEC
        return self.omega_p_kms_kpc * KMS_PER_KPC


@dataclass(frozen=True)
class BudgetTerm:
    """One term of the uncertainty budget.

    Attributes
    ----------
    name : str
        E.g. ``"noise"``, ``"slit bootstrap"``, ``"position angle"``,
        ``"centre"``, ``"inclination"``, ``"all combined"``.
    n_draws : int
    p16, median, p84 : float
        Percentiles of Omega_p, km/s/arcsec.
    sigma : float
        Half of the 16-84 range, km/s/arcsec.
    share : float
        This term's fraction of the summed variances of the separate terms.
    """

    name: str
    n_draws: int
    p16: float
    median: float
    p84: float
    sigma: float
    share: float


@dataclass(frozen=True, eq=False)
class UncertaintyBudget:
    """Monte Carlo uncertainty budget of Omega_p.

    Attributes
    ----------
    terms : tuple of BudgetTerm
        Each source alone, then ``"all combined"`` (every source sampled
        together).
    draws_kms_arcsec : numpy.ndarray
        The combined draws of Omega_p, km/s/arcsec.
    seed : int
        Seed of the ``numpy.random.Generator`` used.
    distance_mpc : float or None
        Distance used for the km/s/kpc conversion.
    """

    terms: tuple[BudgetTerm, ...]
    draws_kms_arcsec: np.ndarray
    seed: int
    distance_mpc: float | None = None

    @property
    def combined(self) -> BudgetTerm:
        return self.terms[-1]


@dataclass(frozen=True, eq=False)
class ConvergenceCurves:
    """Slit integrals against slit half-length.

    Attributes
    ----------
    half_length_arcsec : numpy.ndarray, shape (n_L,)
    x_mean_arcsec, v_mean_kms : numpy.ndarray, shape (n_slits, n_L)
    omega_p_kms_arcsec : numpy.ndarray, shape (n_L,)
    converged : numpy.ndarray of bool, shape (n_slits,)
    tolerance : float
        Relative change over the outer part of the curve accepted as
        converged.
    """

    half_length_arcsec: np.ndarray
    x_mean_arcsec: np.ndarray
    v_mean_kms: np.ndarray
    omega_p_kms_arcsec: np.ndarray
    converged: np.ndarray
    tolerance: float


@dataclass(frozen=True, eq=False)
class PASensitivity:
    """Omega_p against an assumed offset of the position angle.

    Attributes
    ----------
    pa_offset_deg : numpy.ndarray
    omega_p_kms_arcsec, omega_p_err_kms_arcsec : numpy.ndarray
    """

    pa_offset_deg: np.ndarray
    omega_p_kms_arcsec: np.ndarray
    omega_p_err_kms_arcsec: np.ndarray
