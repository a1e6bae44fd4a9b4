"""Pseudo-slits parallel to the line of nodes.

A slit is a strip on the sky, parallel to the line of nodes, at offset ``Y``
from the centre, of full width ``width_arcsec`` and extending from
``x_center - half_length`` to ``x_center + half_length`` along ``X``
(line-of-nodes frame of :mod:`gyrometer.core.coords`). Slits are pure
geometry; their pixel weights are computed by :func:`slit_weights`.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .errors import SlitError

__all__ = ["Slit", "SlitSet"]


@dataclass(frozen=True)
class Slit:
    """One pseudo-slit.

    Attributes
    ----------
    offset_arcsec : float
        ``Y`` offset of the slit's centre line from the disk centre.
    width_arcsec : float
        Full width across the slit.
    half_length_arcsec : float
        Half-length along the line of nodes.
    x_center_arcsec : float
        Centre of the slit along ``X`` (0 = centred on the minor axis).
    """

    offset_arcsec: float
    width_arcsec: float
    half_length_arcsec: float
    x_center_arcsec: float = 0.0

    def __post_init__(self) -> None:
        for name in ("offset_arcsec", "width_arcsec", "half_length_arcsec",
                     "x_center_arcsec"):
            value = getattr(self, name)
            if not isinstance(value, (int, float, np.floating, np.integer)) \
                    or not np.isfinite(value):
                raise SlitError(f"slit {name} must be a finite number",
                                keyword=name, value=value)
            object.__setattr__(self, name, float(value))
        if self.width_arcsec <= 0 or self.half_length_arcsec <= 0:
            raise SlitError("slit width and half-length must be positive",
                            keyword="width_arcsec/half_length_arcsec",
                            value=(self.width_arcsec, self.half_length_arcsec))

    def with_(self, **changes) -> "Slit":
        return replace(self, **changes)


@dataclass(frozen=True)
class SlitSet:
    """An ordered set of slits.

    Attributes
    ----------
    slits : tuple of Slit
    symmetric : bool
        When True, each slit is truncated to the same extent on both sides
        of the minor axis and masked pixels are mirrored ``X -> -X`` within
        the slit, so an axisymmetric disk cancels exactly.
    """

    slits: tuple[Slit, ...]
    symmetric: bool = True

    def __post_init__(self) -> None:
        object.__setattr__(self, "slits", tuple(self.slits))
        for s in self.slits:
            if not isinstance(s, Slit):
                raise SlitError("a slit set holds Slit objects only", value=s)

    def __len__(self) -> int:
        return len(self.slits)

    def __iter__(self):
        return iter(self.slits)

    @classmethod
    def generate(cls, count: int, spacing_arcsec: float, width_arcsec: float,
                 half_length_arcsec: float, *, first_offset_arcsec: float | None = None,
                 symmetric: bool = True) -> "SlitSet":
        """``count`` slits at equal spacing, centred on the minor axis.

        The offsets run symmetrically about the centre:
        ``(k - (count - 1) / 2) * spacing`` for ``k = 0..count-1``, unless
        ``first_offset_arcsec`` is given, in which case they start there.
        """
        if int(count) < 1:
            raise SlitError("a slit set needs at least one slit",
                            keyword="count", value=count)
        if spacing_arcsec <= 0:
            raise SlitError("slit spacing must be positive",
                            keyword="spacing_arcsec", value=spacing_arcsec)
        k = np.arange(int(count), dtype=float)
        if first_offset_arcsec is None:
            offsets = (k - (count - 1) / 2.0) * spacing_arcsec
        else:
            offsets = first_offset_arcsec + k * spacing_arcsec
        return cls(tuple(Slit(float(y), width_arcsec, half_length_arcsec)
                         for y in offsets), symmetric=symmetric)

    def replaced(self, index: int, slit: Slit) -> "SlitSet":
        items = list(self.slits)
        items[index] = slit
        return replace(self, slits=tuple(items))

    def added(self, slit: Slit) -> "SlitSet":
        return replace(self, slits=self.slits + (slit,))

    def removed(self, index: int) -> "SlitSet":
        items = list(self.slits)
        del items[index]
        return replace(self, slits=tuple(items))

    @property
    def offsets_arcsec(self) -> np.ndarray:
        return np.array([s.offset_arcsec for s in self.slits])
