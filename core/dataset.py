"""Plain data classes for what is loaded: cubes and map sets.

These frozen dataclasses are the boundary between the readers, the science
and the desktop app. Arrays are stored read-only (a cube's data may be a
read-only memory map); WCS objects are celestial (2D) only, the spectral axis
is described separately by :class:`SpectralAxis`.

Array axis order follows numpy/FITS: ``(y, x)`` for maps and
``(channel, y, x)`` for cubes. Invalid pixels are NaN.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Provenance", "SpectralAxis", "Cube", "MapSet", "TRACERS"]

#: Tracer kinds understood by the diagnostics (gas tracers get a caveat).
TRACERS = ("stars", "ionised gas", "HI", "CO", "molecular gas", "other")


def _readonly(array: Any) -> Any:
    if isinstance(array, np.ndarray) and array.flags.writeable:
        array = array.view()
        array.flags.writeable = False
    return array


@dataclass(frozen=True)
class Provenance:
    """Where a data array came from.

    Attributes
    ----------
    path : str
        Absolute path of the file as read.
    hdu : str
        HDU name or index (as text) within the file.
    sha256 : str
        Hex SHA-256 checksum of the whole file (empty for in-memory data).
    """

    path: str
    hdu: str
    sha256: str = ""


@dataclass(frozen=True, eq=False)
class SpectralAxis:
    """The spectral axis of a cube, in its native FITS terms.

    Attributes
    ----------
    ctype : str
        FITS CTYPE of the axis after astropy normalisation, e.g. ``"AWAV"``,
        ``"WAVE"``, ``"FREQ"``, ``"VRAD"``, ``"VOPT"``, ``"VELO"``.
    values : numpy.ndarray
        Channel centres in ``unit`` (length = number of channels).
    unit : str
        Unit of ``values`` (astropy unit string: ``"Angstrom"``, ``"Hz"``,
        ``"km / s"`` ...).
    rest_value : float or None
        Rest frequency or wavelength of the line, in ``rest_unit``.
    rest_unit : str
        Unit of ``rest_value`` (``"Hz"`` or ``"Angstrom"`` ...).
    convention : str
        Velocity convention of velocity axes or of the conversion:
        ``"optical"``, ``"radio"`` or ``"relativistic"``.
    air : bool
        True when wavelengths are in air (CTYPE ``AWAV``).
    specsys : str
        FITS SPECSYS (reference frame), e.g. ``"BARYCENT"``, ``"LSRK"``.
    """

    ctype: str
    values: np.ndarray
    unit: str
    rest_value: float | None = None
    rest_unit: str = ""
    convention: str = "optical"
    air: bool = False
    specsys: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "values",
                           _readonly(np.asarray(self.values, dtype=float)))

    @property
    def n_channels(self) -> int:
        return int(self.values.size)


@dataclass(frozen=True, eq=False)
class Cube:
    """A spectral cube with a celestial WCS.

    Attributes
    ----------
    data : numpy.ndarray
        Intensities, shape ``(n_channels, ny, nx)``; may be a read-only
        memory map. Never copied whole as float64.
    wcs : astropy.wcs.WCS
        Celestial (2D) WCS of the spatial axes.
    spectral : SpectralAxis
        The spectral axis.
    unit : str
        BUNIT of ``data``.
    provenance : Provenance
        File, HDU and checksum of ``data``.
    variance : numpy.ndarray or None
        Per-voxel variance in ``unit**2``, same shape, when the file has one.
    name : str
        Object name (OBJECT keyword or file stem).
    psf_fwhm_arcsec : float or None
        Spatial resolution (beam major axis or seeing FWHM), arcsec.
    """

    data: Any
    wcs: Any
    spectral: SpectralAxis
    unit: str
    provenance: Provenance
    variance: Any = None
    name: str = ""
    psf_fwhm_arcsec: float | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "data", _readonly(self.data))
        object.__setattr__(self, "variance", _readonly(self.variance))

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(n) for n in self.data.shape)

    @property
    def spatial_shape(self) -> tuple[int, int]:
        return tuple(int(n) for n in self.data.shape[1:])


@dataclass(frozen=True, eq=False)
class MapSet:
    """Co-registered 2D maps of one tracer: intensity, velocity, dispersion.

    Attributes
    ----------
    intensity : numpy.ndarray
        Tracer surface brightness (any linear unit; its scale cancels in the
        Tremaine-Weinberg ratios), shape ``(ny, nx)``.
    velocity_kms : numpy.ndarray
        Line-of-sight velocity, km/s, same shape.
    wcs : astropy.wcs.WCS
        Celestial WCS shared by all maps.
    intensity_err : numpy.ndarray or None
        1-sigma uncertainty of ``intensity``.
    velocity_err_kms : numpy.ndarray or None
        1-sigma uncertainty of ``velocity_kms``, km/s.
    dispersion_kms, dispersion_err_kms : numpy.ndarray or None
        Line-of-sight velocity dispersion and its error, km/s.
    intensity_unit : str
        Unit of ``intensity``.
    name : str
        Galaxy name.
    tracer : str
        One of :data:`TRACERS`.
    psf_fwhm_arcsec : float or None
        Spatial resolution, arcsec.
    velocity_convention : str
        ``"optical"``, ``"radio"``, ``"relativistic"`` or ``"rest-frame"``
        (velocities relative to a systemic rest frame).
    specsys : str
        Reference frame of the velocities (FITS SPECSYS).
    provenance : tuple of Provenance
        One entry per source array.
    """

    intensity: np.ndarray
    velocity_kms: np.ndarray
    wcs: Any
    intensity_err: np.ndarray | None = None
    velocity_err_kms: np.ndarray | None = None
    dispersion_kms: np.ndarray | None = None
    dispersion_err_kms: np.ndarray | None = None
    intensity_unit: str = ""
    name: str = ""
    tracer: str = "other"
    psf_fwhm_arcsec: float | None = None
    velocity_convention: str = "optical"
    specsys: str = ""
    provenance: tuple[Provenance, ...] = field(default_factory=tuple)

    def __post_init__(self) -> None:
        for name in ("intensity", "velocity_kms", "intensity_err",
                     "velocity_err_kms", "dispersion_kms",
                     "dispersion_err_kms"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name,
                                   _readonly(np.asarray(value, dtype=float)))

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(int(n) for n in self.intensity.shape)
