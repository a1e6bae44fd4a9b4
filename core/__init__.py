"""Gyrometer core: the science of pattern speeds, on numpy, scipy and astropy.

This package never imports Qt. The public, notebook-friendly pipeline lives in
:mod:`gyrometer.core.api`; the plain frozen dataclasses that cross the boundary
to the desktop app live in :mod:`gyrometer.core.dataset`,
:mod:`gyrometer.core.geometry`, :mod:`gyrometer.core.slits` and the result
modules.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
