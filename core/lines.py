"""Rest values of common emission lines.

Optical lines are stored as vacuum wavelengths with their published source;
air wavelengths are derived from them with the IAU standard refractive
index of Morton (2000, ApJS 130, 403), see
:func:`gyrometer.core.spectral.vacuum_to_air`. Radio lines are stored as
rest frequencies. Look lines up with forgiving names::

    >>> get_line("H-alpha").vacuum_angstrom
    6564.608
    >>> get_line("CO(2-1)").frequency_hz
    230538000000.0
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass

import astropy.units as u
from astropy.constants import c

from .errors import SpectralAxisError

__all__ = ["Line", "get_line", "list_lines"]

_C_ANGSTROM_HZ = c.to_value(u.AA * u.Hz)


@dataclass(frozen=True)
class Line:
    """A spectral line and its rest value.

    Attributes
    ----------
    name : str
        Canonical name, e.g. ``"Halpha"``, ``"[NII]6583"``, ``"CO(2-1)"``.
    label : str
        Display label.
    vacuum_angstrom : float or None
        Vacuum rest wavelength, Angstrom (optical lines).
    air_angstrom : float or None
        Air rest wavelength, Angstrom, derived from the vacuum value with
        Morton (2000) (optical lines).
    frequency_hz : float
        Rest frequency, Hz (``c / vacuum wavelength`` for optical lines).
    source : str
        Published source of the stored value.
    aliases : tuple of str
        Other accepted names (matched after normalisation).
    tracer : str
        Tracer kind (:data:`gyrometer.core.dataset.TRACERS`).
    """

    name: str
    label: str
    vacuum_angstrom: float | None
    air_angstrom: float | None
    frequency_hz: float
    source: str
    aliases: tuple[str, ...] = ()
    tracer: str = "other"

    def rest(self, air: bool = False) -> u.Quantity:
        """Rest value as a Quantity: air or vacuum wavelength (Angstrom)
        for optical lines, frequency (Hz) for radio lines."""
        if self.vacuum_angstrom is None:
            return self.frequency_hz * u.Hz
        return (self.air_angstrom if air else self.vacuum_angstrom) * u.AA


_NIST = ("NIST ASD Ritz vacuum wavelength as tabulated by the MaNGA DAP "
         "(Westfall et al. 2019, AJ 158, 231)")
_NIST_MEM = "NIST ASD Ritz vacuum wavelength (from memory)"

# (name, label, vacuum Angstrom, source, aliases, tracer)
_OPTICAL = (
    ("Hbeta", "H\u03b2 4861", 4862.683, _NIST, ("hb", "hbeta4861", "h\u03b2"),
     "ionised gas"),
    ("[OIII]5007", "[O III] 5007", 5008.240, _NIST,
     ("oiii", "oiii5007", "oiii5008", "o3"), "ionised gas"),
    ("[NII]6548", "[N II] 6548", 6549.86, _NIST, ("nii6548", "nii6549"),
     "ionised gas"),
    ("Halpha", "H\u03b1 6563", 6564.608, _NIST,
     ("ha", "halpha6563", "halpha6565", "h\u03b1"), "ionised gas"),
    ("[NII]6583", "[N II] 6583", 6585.27, _NIST,
     ("nii", "nii6583", "nii6584", "nii6585", "n2"), "ionised gas"),
    ("[SII]6716", "[S II] 6716", 6718.29, _NIST_MEM,
     ("sii6716", "sii6717", "sii6718"), "ionised gas"),
    ("[SII]6731", "[S II] 6731", 6732.67, _NIST_MEM,
     ("sii6731", "sii6733"), "ionised gas"),
    ("CaT8498", "Ca II 8498", 8500.36, _NIST_MEM,
     ("caii8498", "ca8498", "cat1", "caii8500"), "stars"),
    ("CaT8542", "Ca II 8542", 8544.44, _NIST_MEM,
     ("caii8542", "ca8542", "cat2", "caii8544"), "stars"),
    ("CaT8662", "Ca II 8662", 8664.52, _NIST_MEM,
     ("caii8662", "ca8662", "cat3", "caii8664"), "stars"),
)

# (name, label, frequency Hz, source, aliases, tracer)
_RADIO = (
    ("HI", "H I 21 cm", 1420.405751768e6,
     "Hellwig et al. 1970 (value as in astropy's tests; citation from memory)",
     ("hi21cm", "h21cm", "21cm", "h1", "hi21"), "HI"),
    ("CO(1-0)", "CO(1\u20130)", 115.2712018e9, "CDMS (from memory)",
     ("co10", "12co10", "co"), "CO"),
    ("CO(2-1)", "CO(2\u20131)", 230.538e9, "CDMS/Lovas (from memory)",
     ("co21", "12co21"), "CO"),
    ("CO(3-2)", "CO(3\u20132)", 345.7959899e9, "CDMS (from memory)",
     ("co32", "12co32"), "CO"),
)


def _normalise(name: str) -> str:
    text = name.strip().lower()
    text = text.replace("\u03b1", "alpha").replace("\u03b2", "beta")
    text = re.sub(r"[\s\-_()\[\]/.]", "", text)
    return text.replace("ca2", "caii")


def _build() -> dict[str, Line]:
    from .spectral import vacuum_to_air  # local: spectral imports lines

    table: dict[str, Line] = {}
    for name, label, vac, source, aliases, tracer in _OPTICAL:
        air = float(vacuum_to_air(vac, method="morton"))
        table[name] = Line(name, label, vac, round(air, 4),
                           _C_ANGSTROM_HZ / vac, source, aliases, tracer)
    for name, label, freq, source, aliases, tracer in _RADIO:
        table[name] = Line(name, label, None, None, freq, source, aliases,
                           tracer)
    return table


@functools.cache
def _table() -> dict[str, Line]:
    """The table, built once on first use (it needs :mod:`.spectral`)."""
    return _build()


def list_lines() -> list[Line]:
    """All built-in lines, optical (by wavelength) then radio."""
    return list(_table().values())


def get_line(name: str | Line) -> Line:
    """Look up a line by a forgiving name.

    ``'Halpha'``, ``'H-alpha'``, ``'Ha'``, ``'H\u03b1'``, ``'[NII]6583'``,
    ``'NII 6584'``, ``'HI'``, ``'21cm'``, ``'CO(2-1)'``, ``'co21'`` ... are
    accepted (case, spaces, brackets, hyphens and underscores are ignored).

    Raises
    ------
    SpectralAxisError
        Unknown line; the message lists the known ones.
    """
    if isinstance(name, Line):
        return name
    key = _normalise(str(name))
    for line in _table().values():
        if key == _normalise(line.name) or key in (
                _normalise(a) for a in line.aliases):
            return line
    known = ", ".join(line.name for line in _table().values())
    raise SpectralAxisError(f"unknown line {name!r}", value=name,
                            hint=f"known lines: {known}; or give the rest "
                                 "frequency/wavelength")
