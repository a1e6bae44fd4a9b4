"""Gyrometer core: the science of pattern speeds, on numpy, scipy and astropy.

This package never imports Qt. The notebook-friendly pipeline is
:mod:`gyrometer.core.api`; its calls are also available here, loaded on
first use so that ``import gyrometer.core`` stays cheap::

    import gyrometer.core as gy
    result = gy.run("sample_cubes/LBDP-011.recipe.toml", draws=200)

The plain frozen dataclasses that cross the boundary to the desktop app live
in :mod:`gyrometer.core.dataset`, :mod:`gyrometer.core.geometry`,
:mod:`gyrometer.core.slits`, :mod:`gyrometer.core.results` and
:mod:`gyrometer.core.pipeline`.
"""

__version__ = "0.1.0"

_API = ("DiskGeometry", "Slit", "SlitSet", "load", "moments",
        "estimate_geometry", "make_slits", "measure", "budget",
        "rotation_curve", "resonances", "run", "export", "load_recipe",
        "load_session", "save_session")

__all__ = ["__version__", *_API]


def __getattr__(name: str):
    if name in _API:
        from . import api
        return getattr(api, name)
    raise AttributeError(f"module 'gyrometer.core' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + list(_API))
