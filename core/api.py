"""The notebook API: the whole pipeline in a few documented calls.

Each call is a thin wrapper of the same function the command line and the
desktop app use (:mod:`gyrometer.core.pipeline` and the science modules);
nothing is implemented twice. Every call returns the project's frozen
dataclasses (:class:`~gyrometer.core.dataset.MapSet`,
:class:`~gyrometer.core.geometry.DiskGeometry`,
:class:`~gyrometer.core.slits.SlitSet`,
:class:`~gyrometer.core.results.TWMeasurement`,
:class:`~gyrometer.core.results.UncertaintyBudget`,
:class:`~gyrometer.core.resonances.ResonanceTable`,
:class:`~gyrometer.core.pipeline.PipelineResult`).

Example (the bundled sample galaxy)::

    from gyrometer.core import api as gy

    result = gy.run("sample_cubes/LBDP-011.recipe.toml", draws=200)
    print(result.row.omega_p_kpc)             # Estimate(value=..., plus=..., minus=...)
    gy.export(result, "LBDP-011-output")      # tables, figures, regions, session

    # or step by step
    cube = gy.load("sample_cubes/LBDP-011_halpha_cube.fits")
    maps = gy.moments(cube, line="Halpha", vsys_kms=1850.0)
    geometry = gy.DiskGeometry(ra_deg=187.4172, dec_deg=8.2617, pa_deg=62.0,
                               inc_deg=45.0, vsys_kms=1850.0, distance_mpc=18.0,
                               pa_err_deg=2.0, inc_err_deg=2.0)
    slits = gy.make_slits(maps, geometry)
    tw = gy.measure(maps, geometry, slits)
    budget = gy.budget(maps, geometry, slits, draws=200, seed=1)
    curve = gy.rotation_curve("sample_cubes/LBDP-011_rotation_curve.ecsv", geometry)
    table = gy.resonances(curve, budget, draws=200, seed=1)
"""

from __future__ import annotations

import os
from dataclasses import replace
from pathlib import Path
from typing import Any

from .geometry import DiskGeometry
from .slits import Slit, SlitSet

__all__ = [
    "DiskGeometry",
    "Slit",
    "SlitSet",
    "load",
    "moments",
    "estimate_geometry",
    "make_slits",
    "measure",
    "budget",
    "rotation_curve",
    "resonances",
    "radial",
    "absorption",
    "run",
    "export",
    "load_recipe",
    "load_session",
    "save_session",
]


def load(path: str | os.PathLike | None = None, **maps):
    """Load a FITS cube or map set.

    Parameters
    ----------
    path : path-like, optional
        A cube or a multi-extension map set (told apart automatically).
    **maps
        Or one file per map: ``intensity=``, ``velocity=``,
        ``intensity_err=``, ``velocity_err=`` (and ``tracer=``), as
        :func:`gyrometer.core.fitsio.load_mapset` takes them.

    Returns
    -------
    Cube or MapSet
    """
    from .fitsio import load_mapset, open_data

    if maps:
        return load_mapset(path, **maps)
    if path is None:
        raise TypeError("give a file, or intensity= and velocity= files")
    return open_data(path)


def moments(cube, *, line: str | None = None, vsys_kms: float | None = None,
            window_halfwidth_kms: float = 500.0, progress=None, cancel=None,
            **settings):
    """Moment maps of a cube (:func:`gyrometer.core.moments.compute_moments`).

    Parameters
    ----------
    cube : Cube
    line : str, optional
        Line name for the rest value (``"Halpha"``, ``"HI"`` ...).
    vsys_kms : float, optional
        Centre of the velocity window, km/s.
    window_halfwidth_kms : float
        Half-width of the window, km/s.
    **settings
        Any other field of :class:`gyrometer.core.moments.MomentSettings`.
    """
    from .moments import MomentSettings, compute_moments

    return compute_moments(cube, MomentSettings(
        line=line, vsys_kms=vsys_kms,
        window_halfwidth_kms=window_halfwidth_kms, **settings),
        progress=progress, cancel=cancel)


def estimate_geometry(maps, *, distance_mpc: float | None = None,
                      **guess: float) -> DiskGeometry:
    """Centre, PA, inclination and V_sys from the velocity map.

    The global thin-disk fit of
    :func:`gyrometer.core.geometry_estimate.kinematic_geometry`, as the
    pipeline runs it for ``[geometry] mode = "estimate"``. ``guess`` takes
    starting values and 1-sigma errors by their recipe names
    (``ra_deg``, ``pa_deg``, ``pa_err_deg`` ...); ``distance_mpc`` is kept.
    """
    from .pipeline import resolve_geometry
    from .session import Session

    items = dict(guess)
    if distance_mpc is not None:
        items["distance_mpc"] = float(distance_mpc)
    session = Session(geometry=None,
                      geometry_guess=tuple((k, float(v)) for k, v in items.items()))
    return resolve_geometry(session, maps)


def make_slits(maps, geometry: DiskGeometry, *, count: int = 0,
               spacing_arcsec: float = 0.0, width_arcsec: float = 0.0,
               half_length_arcsec: float = 0.0, symmetric: bool = True) -> SlitSet:
    """Slits parallel to the line of nodes, by the pipeline's rule.

    Zeros mean "choose from the data" (see
    :func:`gyrometer.core.pipeline.auto_slits`): spacing = the PSF FWHM,
    width = the spacing, each slit as long as the data allow on both sides.
    """
    from .pipeline import auto_slits
    from .session import SlitSpec

    slits = auto_slits(maps, geometry, SlitSpec(count, spacing_arcsec,
                                                width_arcsec, half_length_arcsec))
    return replace(slits, symmetric=symmetric)


def measure(data, geometry: DiskGeometry, slits, **kwargs):
    """The Tremaine-Weinberg measurement (:func:`gyrometer.core.tw.measure`)."""
    from .tw import measure as _measure

    return _measure(data, geometry, slits, **kwargs)


def budget(maps, geometry: DiskGeometry, slits, *, draws: int = 500,
           seed: int = 20261201, progress=None, cancel=None, **terms):
    """Monte Carlo uncertainty budget (:func:`gyrometer.core.budget.run_budget`).

    ``terms`` switch sources on or off by the names of
    :class:`gyrometer.core.budget.BudgetSettings` (``noise=False`` ...).
    """
    from .budget import BudgetSettings, run_budget

    return run_budget(maps, geometry, slits,
                      BudgetSettings(n_draws=int(draws), seed=int(seed), **terms),
                      progress=progress, cancel=cancel)


def rotation_curve(source, geometry: DiskGeometry, *, model: str = "best",
                   radius_unit: str = "arcsec"):
    """A smooth rotation-curve model (:class:`gyrometer.core.rcmodels.CurveFit`).

    Parameters
    ----------
    source : path-like or MapSet
        A rotation-curve table (ECSV/CSV/text), or a map set whose velocity
        map is fitted with tilted rings.
    geometry : DiskGeometry
    model : str
        ``"best"`` (lowest BIC) or one of
        :data:`gyrometer.core.rcmodels.MODEL_NAMES`.
    """
    from .pipeline import _rotation
    from .session import RotationSettings, Session

    if isinstance(source, (str, os.PathLike)):
        settings = RotationSettings(source="file", file=str(Path(source)),
                                    radius_unit=radius_unit, model=model)
        maps = None
    else:
        settings = RotationSettings(source="derived", model=model)
        maps = source
    _, fit = _rotation(Session(rotation=settings), maps, geometry, None,
                       None, [])
    return fit


def resonances(curve_fit, omega_p, *, draws: int = 1000, seed: int = 20261201,
               distance_mpc: float | None = None):
    """Resonance radii with Monte Carlo errors.

    ``omega_p`` is an :class:`~gyrometer.core.results.UncertaintyBudget`,
    an array of draws or a Quantity (see
    :func:`gyrometer.core.resonances.resonance_budget`).
    """
    import numpy as np

    from .resonances import resonance_budget

    return resonance_budget(curve_fit, omega_p,
                            rng=np.random.default_rng(seed), n_draws=int(draws),
                            distance_mpc=distance_mpc)


def radial(maps, geometry: DiskGeometry, slits, *, seed: int = 20261201,
           progress=None, cancel=None, **settings):
    """Pattern speed against radius (:func:`gyrometer.core.radial.measure_radial`).

    ``settings`` are fields of :class:`gyrometer.core.radial.RadialSettings`
    (``n_annuli=``, ``lam=``, ``n_mc=`` ...); the Monte Carlo uses
    ``numpy.random.default_rng(seed)``.
    """
    import numpy as np

    from .radial import RadialSettings, measure_radial

    return measure_radial(maps, geometry, slits, RadialSettings(**settings),
                          rng=np.random.default_rng(seed), progress=progress,
                          cancel=cancel)


def absorption(cube, geometry: DiskGeometry, slits, *, seed: int = 20261201,
               progress=None, cancel=None, **settings):
    """Pattern speed from the slit spectra of an absorption-line cube
    (:func:`gyrometer.core.stellar.measure_absorption`).

    ``settings`` are fields of :class:`gyrometer.core.stellar.StellarSettings`
    (``fit_window_A=``, ``continuum_band_A=``, ``n_mc=`` ...).
    """
    import numpy as np

    from .stellar import StellarSettings, measure_absorption

    return measure_absorption(cube, geometry, slits, StellarSettings(**settings),
                              rng=np.random.default_rng(seed),
                              progress=progress, cancel=cancel)


def run(recipe, *, draws: int | None = None, seed: int | None = None,
        progress=None, cancel=None):
    """Run a recipe or session file (or a Session) through the whole pipeline.

    Returns a :class:`~gyrometer.core.pipeline.PipelineResult`; nothing is
    written (see :func:`export`).
    """
    from .pipeline import run_session
    from .recipe import load_any
    from .session import Session

    session = recipe if isinstance(recipe, Session) else load_any(recipe)
    changes: dict[str, Any] = {}
    if draws is not None:
        changes["n_draws"] = int(draws)
    if seed is not None:
        changes["seed"] = int(seed)
    if changes:
        session = session.with_(budget=replace(session.budget, **changes))
    return run_session(session, progress=progress, cancel=cancel)


def export(result, folder: str | os.PathLike | None = None, *,
           overwrite: bool = False) -> dict:
    """Write a result's tables, figures, slit regions and session file.

    See :func:`gyrometer.core.pipeline.export_result`; returns kind -> path.
    """
    from .pipeline import export_result

    return export_result(result, folder, overwrite=overwrite)


def load_recipe(path: str | os.PathLike):
    """Read and validate a recipe (:func:`gyrometer.core.recipe.load_recipe`)."""
    from .recipe import load_recipe as _load

    return _load(path)


def load_session(path: str | os.PathLike):
    """Read a session file (:func:`gyrometer.core.session.load_session`)."""
    from .session import load_session as _load

    return _load(path)


def save_session(session, path: str | os.PathLike, overwrite: bool = False):
    """Write a session file (:func:`gyrometer.core.session.save_session`)."""
    from .session import save_session as _save

    return _save(session, path, overwrite)
