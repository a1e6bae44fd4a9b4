"""Diagnostics of a Tremaine-Weinberg measurement.

* :func:`convergence`: ``<X>``, ``<V>`` and ``Omega_p`` against slit
  half-length, with a per-slit convergence flag (DOMAIN notes: the curves
  must plateau; Zou et al. 2019, ApJ 884, 23).
* :func:`pa_sensitivity`: ``Omega_p`` for assumed position-angle offsets,
  the dominant systematic (Debattista 2003, MNRAS 342, 1194; Zou et al.
  2019; Garma-Oehmichen et al. 2020, MNRAS 491, 3655).
* :func:`check_measurement`: warnings about the geometry, the number and
  signal-to-noise of slits and the tracer.
"""

from __future__ import annotations

import warnings

import numpy as np

from .dataset import MapSet
from .errors import (ConvergenceWarning, DataQualityWarning, FitError,
                     GeometryWarning, TracerWarning)
from .geometry import DiskGeometry
from .results import ConvergenceCurves, PASensitivity, TWMeasurement
from .slits import SlitSet, pixel_frame, slit_weights

__all__ = [
    "INCLINATION_RANGE_DEG",
    "MIN_SLITS",
    "MIN_SLIT_SNR",
    "GAS_TRACERS",
    "convergence",
    "pa_sensitivity",
    "check_measurement",
]

#: Inclinations where the method is reliable, degrees (Zou et al. 2019,
#: ApJ 884, 23: 15 deg <~ i <~ 70 deg).
INCLINATION_RANGE_DEG = (15.0, 70.0)

#: Fewest slits for a meaningful line fit (common practice).
MIN_SLITS = 3

#: Slits whose integrated flux ``int S dX`` has a signal-to-noise ratio below
#: this are noise-dominated (common practice). The flux, not ``<X>`` or
#: ``<V>``, is tested: a slit through the centre has ``<X> ~ <V> ~ 0`` by
#: symmetry and is still a good point of the fit.
MIN_SLIT_SNR = 3.0

#: Tracers that get the gas caveat (Borodina et al. 2023, MNRAS 524, 3437:
#: TW on gas tracers generally does not recover the bar pattern speed).
GAS_TRACERS = ("ionised gas", "HI", "CO", "molecular gas")


def check_measurement(measurement: TWMeasurement, tracer: str | None = None, *,
                      issue: bool = True) -> list[str]:
    """Warnings about a measurement, as text (and as Python warnings).

    Checks
    ------
    * inclination outside 15-70 deg (Zou et al. 2019) -> GeometryWarning;
    * fewer than 3 slits in the fit (common practice) -> DataQualityWarning;
    * slits whose flux has a signal-to-noise ratio below 3 (common
      practice) -> DataQualityWarning;
    * truncated slits -> DataQualityWarning;
    * gas tracers (Borodina et al. 2023) -> TracerWarning.

    Slits are numbered from 1 in every message, as in the app's slit table.

    Parameters
    ----------
    measurement : TWMeasurement
    tracer : str, optional
        One of :data:`gyrometer.core.dataset.TRACERS`.
    issue : bool
        Also issue each message with :func:`warnings.warn`.
    """
    out: list[tuple[str, type]] = []
    inc = measurement.geometry.inc_deg
    lo, hi = INCLINATION_RANGE_DEG
    if not lo <= inc <= hi:
        out.append((f"inclination {inc:.1f} deg is outside {lo:.0f}-{hi:.0f} deg, "
                    "where the Tremaine-Weinberg method is reliable (Zou et al. "
                    "2019, ApJ 884, 23)", GeometryWarning))
    n_used = int(np.count_nonzero(measurement.used))
    if n_used < MIN_SLITS:
        out.append((f"only {n_used} slit(s) in the fit; use at least {MIN_SLITS}",
                    DataQualityWarning))
    ig = measurement.integrals
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = ig.flux / ig.flux_err
    noisy = np.flatnonzero((np.abs(ig.flux) > 0) & (snr < MIN_SLIT_SNR))
    if noisy.size:
        out.append((f"slit(s) {', '.join(str(k + 1) for k in noisy)} are dominated by "
                    f"noise (flux signal-to-noise below {MIN_SLIT_SNR:g})",
                    DataQualityWarning))
    cut = np.flatnonzero(measurement.used & ig.truncated)
    if cut.size:
        out.append((f"slit(s) {', '.join(str(k + 1) for k in cut)} are cut by the field "
                    "edge or by masked pixels", DataQualityWarning))
    if tracer in GAS_TRACERS:
        out.append((f"tracer '{tracer}': gas may violate continuity; Tremaine-"
                    "Weinberg pattern speeds from gas are less reliable "
                    "(Borodina et al. 2023, MNRAS 524, 3437)", TracerWarning))
    if issue:
        for text, kind in out:
            warnings.warn(text, kind, stacklevel=3)
    return [text for text, _ in out]


def _measure_quiet(maps, geometry, slits, weights=None, symmetric=True):
    from .tw import measure  # avoids an import cycle (tw imports this module)
    return measure(maps, geometry, slits, weights=weights, symmetric=symmetric,
                   warn=False)


def convergence(maps: MapSet, geometry: DiskGeometry, slits: SlitSet,
                half_lengths=None, *, tolerance: float = 0.05,
                symmetric: bool | None = None) -> ConvergenceCurves:
    """Slit integrals and Omega_p against slit half-length.

    Parameters
    ----------
    maps : MapSet
    geometry : DiskGeometry
    slits : SlitSet
    half_lengths : array_like, optional
        Half-lengths to try, arcsec (all slits get the same value);
        default 12 values from 20 % to 100 % of the longest slit.
    tolerance : float
        Convergence criterion (see Notes).
    symmetric : bool, optional
        Defaults to ``slits.symmetric``.

    Returns
    -------
    ConvergenceCurves

    Notes
    -----
    A slit is *converged* when, over the outer 20 % of the half-length range
    (``L >= L_min + 0.8 (L_max - L_min)``), the spread (max - min) of its
    ``<X>`` is at most ``tolerance * max(|<X>(L_max)|, pixel scale)`` and
    that of ``<V>`` at most ``tolerance * max(|<V>(L_max)|, 1 km/s) +
    2 sigma(<V>(L_max))`` (our criterion; the floors keep slits near the
    centre, where ``<X>`` and ``<V>`` tend to zero, from being flagged
    by noise alone). Non-converged slits raise a ConvergenceWarning.
    """
    items = tuple(slits)
    if symmetric is None:
        symmetric = getattr(slits, "symmetric", True)
    if half_lengths is None:
        top = max(s.half_length_arcsec for s in items)
        half_lengths = np.linspace(0.2 * top, top, 12)
    half_lengths = np.sort(np.asarray(half_lengths, dtype=float))
    if half_lengths.size < 2 or np.any(half_lengths <= 0):
        raise FitError("convergence needs at least two positive half-lengths",
                       keyword="half_lengths", value=half_lengths)
    frame = pixel_frame(maps.wcs, maps.shape, geometry)
    n_s, n_l = len(items), half_lengths.size
    x = np.full((n_s, n_l), np.nan)
    v = np.full((n_s, n_l), np.nan)
    verr = np.full(n_s, np.nan)
    omega = np.full(n_l, np.nan)
    for j, half in enumerate(half_lengths):
        trial = tuple(s.with_(half_length_arcsec=float(half)) for s in items)
        weights = slit_weights(trial, geometry, maps.wcs, maps.shape, frame=frame)
        try:
            m = _measure_quiet(maps, geometry, trial, weights, symmetric)
        except FitError:
            continue
        x[:, j] = m.integrals.x_mean_arcsec
        v[:, j] = m.integrals.v_mean_kms
        omega[j] = m.omega_p_kms_arcsec
        verr = m.integrals.v_err_kms
    outer = half_lengths >= half_lengths[0] + 0.8 * (half_lengths[-1] - half_lengths[0])
    with np.errstate(invalid="ignore"):
        spread_x = np.nanmax(x[:, outer], axis=1) - np.nanmin(x[:, outer], axis=1)
        spread_v = np.nanmax(v[:, outer], axis=1) - np.nanmin(v[:, outer], axis=1)
        tol_x = tolerance * np.maximum(np.abs(x[:, -1]), frame.pixel_scale_arcsec)
        tol_v = (tolerance * np.maximum(np.abs(v[:, -1]), 1.0)
                 + 2.0 * np.nan_to_num(verr, nan=0.0))
        converged = (spread_x <= tol_x) & (spread_v <= tol_v)
    bad = np.flatnonzero(~converged)
    if bad.size:
        warnings.warn(f"slit(s) {', '.join(str(k + 1) for k in bad)} have not converged "
                      "with slit length: lengthen them or check the data extent",
                      ConvergenceWarning, stacklevel=2)
    return ConvergenceCurves(half_lengths, x, v, omega, converged, float(tolerance))


def pa_sensitivity(maps: MapSet, geometry: DiskGeometry, slits: SlitSet,
                   offsets_deg=np.arange(-10, 11, 2), *,
                   symmetric: bool | None = None) -> PASensitivity:
    """Omega_p re-measured for assumed offsets of the position angle.

    The disk PA is the dominant systematic of the method: tens of percent
    for errors of a few degrees (Zou et al. 2019, ApJ 884, 23); DOMAIN
    notes recommend showing Omega_p over PA +- 10 deg.

    Parameters
    ----------
    offsets_deg : array_like
        PA offsets, degrees (default -10 to 10 in steps of 2).

    Returns
    -------
    PASensitivity
        Omega_p and its fit error (km/s/arcsec) per offset; NaN where the
        fit fails.
    """
    items = tuple(slits)
    if symmetric is None:
        symmetric = getattr(slits, "symmetric", True)
    offsets = np.asarray(offsets_deg, dtype=float)
    frame = pixel_frame(maps.wcs, maps.shape, geometry)
    omega = np.full(offsets.size, np.nan)
    err = np.full(offsets.size, np.nan)
    for j, off in enumerate(offsets):
        geo = geometry.with_(pa_deg=geometry.pa_deg + float(off))
        weights = slit_weights(items, geo, maps.wcs, maps.shape, frame=frame)
        try:
            m = _measure_quiet(maps, geo, items, weights, symmetric)
        except FitError:
            continue
        omega[j] = m.omega_p_kms_arcsec
        err[j] = m.omega_p_err_kms_arcsec
    return PASensitivity(offsets, omega, err)
