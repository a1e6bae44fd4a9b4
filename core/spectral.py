"""Channel velocities of a spectral axis, and air/vacuum wavelengths.

Velocity conventions (FITS WCS III, Greisen et al. 2006, A&A 446, 747,
Table 1), with rest frequency nu0 / wavelength lambda0:

* radio:        V = c (nu0 - nu) / nu0
* optical:      V = c (lambda - lambda0) / lambda0 = c z
* relativistic: V = c (nu0^2 - nu^2) / (nu0^2 + nu^2)

Conversions go through :func:`astropy.units.doppler_radio`,
:func:`~astropy.units.doppler_optical` and
:func:`~astropy.units.doppler_relativistic`.

Air wavelengths (FITS ``AWAV`` axes, and rest wavelengths flagged as air)
are converted to vacuum before the Doppler formula is applied (the FITS
RESTWAV keyword and our line table hold vacuum values): mixing an air axis
with a vacuum rest wavelength would shift velocities by about 83 km/s at
H-alpha. Three refractive-index formulas are offered:

* ``'morton'``: Morton (2000, ApJS 130, 403), the IAU standard,
  n - 1 = 8.34254e-5 + 2.406147e-2 / (130 - s^2) + 1.5998e-4 / (38.9 - s^2),
  s = 1e4 / lambda_vac [Angstrom];
* ``'ciddor'``: Ciddor (1996, Appl. Opt. 35, 1566),
  n - 1 = 5.792105e-2 / (238.0185 - s^2) + 1.67917e-3 / (57.362 - s^2),
  s in 1/micron;
* ``'greisen'``: Greisen et al. (2006) eq. 65 (the FITS ``AWAV`` definition),
  n - 1 = 1e-6 (287.6155 + 1.62887 / lambda^2 + 0.01360 / lambda^4),
  lambda in micron.

All three take the vacuum wavelength; air to vacuum is solved by fixed-point
iteration lambda_vac = lambda_air n(lambda_vac).
"""

from __future__ import annotations

from typing import Callable

import astropy.units as u
import numpy as np
from astropy.constants import c

from .dataset import SpectralAxis
from .errors import SpectralAxisError

__all__ = [
    "channel_velocities",
    "channel_edges",
    "resolve_rest",
    "air_to_vacuum",
    "vacuum_to_air",
    "refractive_index",
    "CONVENTIONS",
]

#: Velocity conventions understood here.
CONVENTIONS = ("radio", "optical", "relativistic")

_C_KMS = c.to_value(u.km / u.s)
_VELOCITY_FAMILIES = {"VRAD": "radio", "VOPT": "optical", "VELO": "relativistic",
                      "ZOPT": "optical", "BETA": "relativistic"}
_DOPPLER: dict[str, Callable] = {"radio": u.doppler_radio,
                                 "optical": u.doppler_optical,
                                 "relativistic": u.doppler_relativistic}


def _n_morton(vac_aa: np.ndarray) -> np.ndarray:
    s2 = (1e4 / vac_aa) ** 2
    return 1 + 8.34254e-5 + 2.406147e-2 / (130 - s2) + 1.5998e-4 / (38.9 - s2)


def _n_ciddor(vac_aa: np.ndarray) -> np.ndarray:
    s2 = (1e4 / vac_aa) ** 2
    return 1 + 5.792105e-2 / (238.0185 - s2) + 1.67917e-3 / (57.362 - s2)


def _n_greisen(vac_aa: np.ndarray) -> np.ndarray:
    lam2 = (vac_aa * 1e-4) ** 2
    return 1 + 1e-6 * (287.6155 + 1.62887 / lam2 + 0.01360 / lam2 ** 2)


_INDEX = {"morton": _n_morton, "ciddor": _n_ciddor, "greisen": _n_greisen}


def refractive_index(vac_angstrom: float | np.ndarray,
                     method: str = "morton") -> np.ndarray:
    """Refractive index of standard air at vacuum wavelength(s), Angstrom.

    See the module docstring for the formulas and their sources.
    """
    try:
        func = _INDEX[method]
    except KeyError as exc:
        raise ValueError(f"unknown air/vacuum method {method!r}; use one of "
                         f"{sorted(_INDEX)}") from exc
    return func(np.asarray(vac_angstrom, dtype=float))


def vacuum_to_air(wav_angstrom: float | np.ndarray,
                  method: str = "morton") -> np.ndarray:
    """Air wavelength(s), Angstrom, from vacuum wavelength(s), Angstrom:
    lambda_air = lambda_vac / n(lambda_vac)."""
    vac = np.asarray(wav_angstrom, dtype=float)
    return vac / refractive_index(vac, method)


def air_to_vacuum(wav_angstrom: float | np.ndarray,
                  method: str = "morton") -> np.ndarray:
    """Vacuum wavelength(s), Angstrom, from air wavelength(s), Angstrom.

    Solves lambda_vac = lambda_air n(lambda_vac) by fixed-point iteration
    (converges to < 1e-9 Angstrom in a few steps since n - 1 ~ 3e-4).
    """
    air = np.asarray(wav_angstrom, dtype=float)
    vac = air.copy()
    for _ in range(8):
        vac = air * refractive_index(vac, method)
    return vac


def resolve_rest(axis: SpectralAxis, rest: object = None,
                 rest_air: bool = False) -> tuple[u.Quantity | None, bool]:
    """The rest value to use and whether it is an air wavelength.

    Parameters
    ----------
    axis : SpectralAxis
    rest : Quantity, str, Line or None
        A rest frequency or wavelength; a line name or
        :class:`~gyrometer.core.lines.Line` (its vacuum value); or None for
        the axis's own
        rest value (FITS RESTFRQ/RESTWAV, a vacuum value).
    rest_air : bool
        A Quantity wavelength given in ``rest`` is an air wavelength.
    """
    from .lines import Line, get_line

    if rest is None:
        if axis.rest_value is None or not axis.rest_unit:
            return None, False
        return axis.rest_value * u.Unit(axis.rest_unit), False
    if isinstance(rest, (str, Line)):
        return get_line(rest).rest(air=False), False
    quantity = u.Quantity(rest)
    if quantity.unit.physical_type not in ("frequency", "length", "energy",
                                           "wavenumber"):
        raise SpectralAxisError(f"rest value {quantity} is not a frequency or "
                                "wavelength", value=str(quantity))
    return quantity, bool(rest_air) and quantity.unit.physical_type == "length"


def channel_edges(values: np.ndarray) -> np.ndarray:
    """Channel edges (n + 1) halfway between centres, ends extrapolated."""
    values = np.asarray(values, dtype=float)
    if values.size < 2:
        raise SpectralAxisError("the spectral axis has fewer than 2 channels")
    mid = 0.5 * (values[1:] + values[:-1])
    return np.concatenate([[values[0] - (mid[0] - values[0])], mid,
                           [values[-1] + (values[-1] - mid[-1])]])


def _velocity_of(native: u.Quantity, family: str, convention: str,
                 rest: u.Quantity | None, rest_is_air: bool, air_axis: bool,
                 air_method: str) -> np.ndarray:
    """Velocities (km/s) of native spectral coordinates."""
    if family in _VELOCITY_FAMILIES:
        if family == "ZOPT":
            native = native.to_value(u.dimensionless_unscaled) * _C_KMS * u.km / u.s
        elif family == "BETA":
            native = native.to_value(u.dimensionless_unscaled) * _C_KMS * u.km / u.s
        own = _VELOCITY_FAMILIES[family]
        v = native.to(u.km / u.s)
        if own == convention:
            return v.value
        # change of convention through the frequency ratio nu/nu0 (any rest)
        unit_rest = 1.0 * u.Hz
        ratio = v.to(u.Hz, equivalencies=_DOPPLER[own](unit_rest))
        return ratio.to_value(u.km / u.s,
                              equivalencies=_DOPPLER[convention](unit_rest))
    if rest is None:
        wavelength_axis = native.unit.physical_type == "length"
        raise SpectralAxisError(
            "no rest value to turn the spectral axis into velocities",
            keyword="RESTWAV" if wavelength_axis else "RESTFRQ",
            hint="add RESTWAV (wavelength axes, vacuum, in m) or RESTFRQ "
                 "(frequency axes, Hz) to the header, or choose a line")
    # Doppler shifts apply to vacuum wavelengths: take both to vacuum
    if air_axis and native.unit.physical_type == "length":
        native = air_to_vacuum(native.to_value(u.AA), air_method) * u.AA
    if rest_is_air:
        rest = air_to_vacuum(rest.to_value(u.AA), air_method) * u.AA
    return native.to_value(u.km / u.s,
                           equivalencies=_DOPPLER[convention](rest))


def channel_velocities(axis: SpectralAxis, rest: object = None,
                       convention: str | None = None, *,
                       rest_air: bool = False,
                       air_method: str = "morton"
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Channel-centre velocities and channel widths, km/s.

    Parameters
    ----------
    axis : SpectralAxis
        Any spectral axis: frequency, (air or vacuum) wavelength, energy,
        wavenumber, or velocity (VRAD, VOPT, VELO, ZOPT, BETA).
    rest : Quantity, str, Line or None
        Rest frequency or wavelength (vacuum unless ``rest_air``), a line
        name (e.g. ``"Halpha"``) or None for the axis's RESTFRQ/RESTWAV.
        Velocity axes need no rest value.
    convention : {'radio', 'optical', 'relativistic'}, optional
        Output convention; default the axis's own.
    rest_air : bool
        ``rest`` is an air wavelength.
    air_method : {'morton', 'ciddor', 'greisen'}
        Refractive index used when air and vacuum values meet.

    Returns
    -------
    v_kms : numpy.ndarray
        Velocity of each channel centre, km/s (absolute, in ``convention``).
    dv_kms : numpy.ndarray
        Positive channel widths, km/s: differences of the velocities of the
        channel edges (halfway between centres), so widths vary along axes
        that are linear in frequency or wavelength. A decreasing axis gives
        positive widths too.

    Raises
    ------
    SpectralAxisError
        A rest value is needed and missing, or the convention is unknown.
    """
    convention = (convention or axis.convention or "optical").lower()
    if convention not in CONVENTIONS:
        raise SpectralAxisError(f"unknown velocity convention {convention!r}",
                                value=convention,
                                hint=f"use one of {', '.join(CONVENTIONS)}")
    family = axis.ctype.upper()[:4]
    unit = u.Unit(axis.unit) if axis.unit else u.dimensionless_unscaled
    rest_q, rest_is_air = resolve_rest(axis, rest, rest_air)
    centres = np.asarray(axis.values, dtype=float)
    edges = channel_edges(centres)
    both = np.concatenate([centres, edges]) * unit
    v = _velocity_of(both, family, convention, rest_q, rest_is_air,
                     axis.air, air_method)
    n = centres.size
    v_kms = v[:n]
    dv_kms = np.abs(np.diff(v[n:]))
    return v_kms, dv_kms
