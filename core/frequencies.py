"""Orbital frequencies of a thin disk from its circular-velocity curve.

All functions are pure and unit-agnostic: radii may be in arcsec or kpc and
velocities in km/s; frequencies then come out in km/s per that radius unit
(km/s/arcsec is distance-free, km/s/kpc is the usual published unit).

Formulas (Binney & Tremaine 2008, *Galactic Dynamics*, 2nd ed., §3.2.3 and
§3.3.3; equation numbers not quoted here):

* angular frequency ``Omega = V / R``;
* epicyclic frequency ``kappa^2 = R dOmega^2/dR + 4 Omega^2
  = (2 V / R^2) (V + R dV/dR)``;
* Lindblad curves of an m-fold pattern ``Omega -+ kappa / m``; a resonance
  sits where one of them equals the pattern speed ``Omega_p``;
* Oort constants ``A = (V/R - dV/dR) / 2``, ``B = -(V/R + dV/dR) / 2``, so
  ``Omega = A - B`` and ``kappa^2 = -4 B (A - B)``.

``dV/dR`` must come from a smooth model of the curve (see
:mod:`gyrometer.core.rcmodels`), never from differences of raw points.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "omega",
    "kappa",
    "lindblad_curve",
    "oort_constants",
    "kappa_from_oort",
    "FrequencyCurves",
    "frequency_curves",
]


def omega(v_kms, r) -> np.ndarray:
    """Angular frequency ``Omega = V / R`` in km/s per unit of ``r``."""
    v_kms = np.asarray(v_kms, dtype=float)
    r = np.asarray(r, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return v_kms / r


def kappa(v_kms, dvdr, r) -> np.ndarray:
    """Epicyclic frequency from ``kappa^2 = (2 V / R^2) (V + R dV/dR)``.

    Parameters
    ----------
    v_kms : array_like
        Circular velocity, km/s.
    dvdr : array_like
        Its radial derivative, km/s per unit of ``r``.
    r : array_like
        Radius (> 0).

    Returns
    -------
    numpy.ndarray
        kappa in km/s per unit of ``r``; NaN where ``kappa^2 < 0`` (a curve
        falling faster than Keplerian is not a stable circular orbit).
    """
    v_kms = np.asarray(v_kms, dtype=float)
    dvdr = np.asarray(dvdr, dtype=float)
    r = np.asarray(r, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        k2 = 2.0 * v_kms / r**2 * (v_kms + r * dvdr)
        return np.where(k2 >= 0, np.sqrt(np.abs(k2)), np.nan)


def lindblad_curve(v_kms, dvdr, r, m: float, sign: int) -> np.ndarray:
    """``Omega + sign * kappa / m`` (sign -1: inner, +1: outer; 0: Omega).

    A pattern of speed ``Omega_p`` with m-fold symmetry has its inner/outer
    Lindblad resonance where ``m (Omega - Omega_p) = -+ kappa``, i.e. where
    this curve equals ``Omega_p`` (Binney & Tremaine 2008, §3.3.3).
    """
    if sign not in (-1, 0, 1):
        raise ValueError("sign must be -1, 0 or +1")
    om = omega(v_kms, r)
    if sign == 0:
        return om
    if m <= 0:
        raise ValueError("m must be positive")
    return om + sign * kappa(v_kms, dvdr, r) / float(m)


def oort_constants(v_kms, dvdr, r) -> tuple[np.ndarray, np.ndarray]:
    """Oort constants ``A = (V/R - dV/dR)/2`` and ``B = -(V/R + dV/dR)/2``.

    Units: km/s per unit of ``r`` (Binney & Tremaine 2008, §3.2.3).
    """
    om = omega(v_kms, r)
    dvdr = np.asarray(dvdr, dtype=float)
    return 0.5 * (om - dvdr), -0.5 * (om + dvdr)


def kappa_from_oort(a, b) -> np.ndarray:
    """``kappa = sqrt(-4 B (A - B))`` from the Oort constants."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    return np.sqrt(-4.0 * b * (a - b))


@dataclass(frozen=True, eq=False)
class FrequencyCurves:
    """Omega, kappa and the Lindblad curves on a radius grid (for plots).

    Attributes
    ----------
    r_arcsec : numpy.ndarray
        Radii in the disk plane, arcsec.
    r_kpc : numpy.ndarray or None
        The same in kpc (None without a distance).
    unit : str
        ``"km/s/kpc"`` when a distance was given, else ``"km/s/arcsec"``.
    omega, kappa : numpy.ndarray
        In ``unit``.
    lindblad : dict
        ``m -> (Omega - kappa/m, Omega + kappa/m)``, in ``unit``.
    """

    r_arcsec: np.ndarray
    r_kpc: np.ndarray | None
    unit: str
    omega: np.ndarray
    kappa: np.ndarray
    lindblad: dict


def frequency_curves(curve, r_arcsec, *, distance_mpc: float | None = None,
                     ms=(2, 4)) -> FrequencyCurves:
    """Evaluate Omega, kappa and Omega -+ kappa/m for a smooth curve.

    Parameters
    ----------
    curve : object
        Anything with ``v(r_arcsec)`` and ``dvdr(r_arcsec)`` methods, e.g. a
        :class:`gyrometer.core.rcmodels.CurveFit` (km/s and km/s/arcsec).
    r_arcsec : array_like
        Radii (> 0), arcsec.
    distance_mpc : float, optional
        Distance; frequencies are then in km/s/kpc.
    ms : sequence of int
        Pattern multiplicities for the Lindblad curves.
    """
    from .geometry import kpc_per_arcsec

    r_arcsec = np.asarray(r_arcsec, dtype=float)
    v = np.asarray(curve.v(r_arcsec), dtype=float)
    dv = np.asarray(curve.dvdr(r_arcsec), dtype=float)
    scale = 1.0
    unit = "km/s/arcsec"
    r_kpc = None
    if distance_mpc is not None:
        scale = 1.0 / kpc_per_arcsec(distance_mpc)
        unit = "km/s/kpc"
        r_kpc = r_arcsec * kpc_per_arcsec(distance_mpc)
    om = omega(v, r_arcsec) * scale
    ka = kappa(v, dv, r_arcsec) * scale
    lind = {int(m): (om - ka / m, om + ka / m) for m in ms}
    return FrequencyCurves(r_arcsec, r_kpc, unit, om, ka, lind)
