"""The one pipeline behind the desktop app, the notebook API and the command line.

:func:`run_session` takes a :class:`~gyrometer.core.session.Session` and
runs every step in order, each step a call into the science modules:

1. load the inputs (:mod:`~gyrometer.core.fitsio`), recording SHA-256
   checksums and refusing inputs that changed since a session was saved;
2. moment maps of a cube (:mod:`~gyrometer.core.moments`);
3. the disk geometry, given or estimated (:mod:`~gyrometer.core.geometry_estimate`);
4. the slit set, given or made by the session's rule;
5. the Tremaine-Weinberg measurement (:func:`gyrometer.core.tw.measure`);
6. the Monte Carlo uncertainty budget (:func:`gyrometer.core.budget.run_budget`);
7. convergence and position-angle diagnostics (:mod:`~gyrometer.core.diagnostics`);
8. the rotation curve and its smooth model (:mod:`~gyrometer.core.rotation`,
   :mod:`~gyrometer.core.rcmodels`);
9. resonance radii with Monte Carlo errors (:mod:`~gyrometer.core.resonances`);
10. the bar length and R = R_CR / R_bar (:mod:`~gyrometer.core.bars`).

The result is a frozen :class:`PipelineResult`; :func:`export_result` writes
its tables, figures, region file and session file. A run is deterministic
for a given session: every random draw descends from the session's seed
(``numpy.random.SeedSequence``). Long steps report ``progress(done, total,
stage)`` and stop with :class:`~gyrometer.core.errors.Cancelled` when
``cancel.is_set()``; nothing is written before :func:`export_result`, and
the export writes into a staging folder first, so a failed or cancelled
run leaves no half-written file.
"""

from __future__ import annotations

import math
import os
import re
import shutil
import tempfile
import warnings
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from .errors import (FitError, GeometryError, OutputError,
                     RotationCurveError, SessionError)
from .geometry import DiskGeometry, kpc_per_arcsec
from .progress import CancelFlag, ProgressCallback, check_cancel, report
from .session import InputSpec, Session, save_session, session_to_dict
from .slits import SlitSet
from .tables import Estimate, ResultRow

__all__ = [
    "STAGES",
    "PipelineResult",
    "BarSummary",
    "load_inputs",
    "maps_for",
    "resolve_geometry",
    "cube_velocities",
    "resolve_slits",
    "auto_slits",
    "shifted_budget",
    "run_session",
    "result_row",
    "result_details",
    "results_table",
    "output_paths",
    "export_result",
]

#: Stage names reported to ``progress`` (in order).
STAGES = ("loading data", "moment maps", "geometry", "slits",
          "pattern speed", "uncertainty budget", "diagnostics",
          "rotation curve", "resonances", "bar")

#: Position-angle offsets of the sensitivity panel, degrees (DOMAIN notes
#: section 7: show Omega_p over PA +- 10 deg).
PA_OFFSETS_DEG = tuple(float(x) for x in np.arange(-10.0, 10.5, 2.0))


@dataclass(frozen=True)
class BarSummary:
    """Bar length and rotation rate.

    Attributes
    ----------
    length : gyrometer.core.bars.BarLength or None
        Deprojected bar semi-length (None: no bar length).
    rate : gyrometer.core.bars.BarRate or None
        R = R_CR / R_bar (None without a bar length or a corotation radius).
    note : str
        Why a value is missing, in plain words.
    """

    length: Any = None
    rate: Any = None
    note: str = ""


@dataclass(frozen=True, eq=False)
class PipelineResult:
    """Everything one run produced.

    Attributes
    ----------
    session : Session
        The *resolved* session: geometry, slits and input checksums filled
        in, so saving it reproduces this result exactly.
    data : MapSet or Cube
        The data as loaded.
    maps : MapSet
        The maps (the moment maps of a cube).
    measurement : TWMeasurement
    budget : UncertaintyBudget or None
    convergence : ConvergenceCurves or None
    pa_sensitivity : PASensitivity or None
    rotation_curve : RotationCurve or None
    curve_fit : CurveFit or None
        The smooth model used for Omega and kappa.
    resonances : ResonanceTable or None
    bar : BarSummary
    row : ResultRow
        The paper-table row of this galaxy.
    warnings : tuple of str
        Everything the user should read, in plain words.
    """

    session: Session
    data: Any
    maps: Any
    measurement: Any
    budget: Any
    convergence: Any
    pa_sensitivity: Any
    rotation_curve: Any
    curve_fit: Any
    resonances: Any
    bar: BarSummary
    row: ResultRow
    warnings: tuple[str, ...] = ()

    @property
    def name(self) -> str:
        return self.row.galaxy


class _Stages:
    """Forwards inner progress as ``stage k/N: name``."""

    def __init__(self, progress: ProgressCallback | None,
                 cancel: CancelFlag | None) -> None:
        self.progress = progress
        self.cancel = cancel
        self.k = 0

    def start(self, name: str) -> ProgressCallback | None:
        check_cancel(self.cancel, name)
        self.k = STAGES.index(name)
        report(self.progress, self.k, len(STAGES), name)
        if self.progress is None:
            return None
        outer = self.progress

        def inner(done: int, total: int, stage: str) -> None:
            if not stage or stage.startswith(name):
                outer(done, total, stage or name)
            else:
                outer(done, total, f"{name}: {stage}")
        return inner

    def finish(self) -> None:
        report(self.progress, len(STAGES), len(STAGES), "done")


# -- steps --------------------------------------------------------------------
def load_inputs(spec: InputSpec, *, tracer: str | None = None,
                progress: ProgressCallback | None = None,
                cancel: CancelFlag | None = None):
    """Load the data named by an :class:`InputSpec`.

    Returns ``(data, sha256)`` with ``data`` a MapSet or Cube and
    ``sha256`` a tuple of ``(role, hex digest)``. When ``spec.sha256`` was
    recorded (a saved session), a file whose checksum differs raises
    :class:`SessionError` naming it.
    """
    from .fitsio import file_sha256, load_cube, load_mapset

    files = spec.files()
    if spec.kind == "cube":
        data = load_cube(files["cube"], progress=progress, cancel=cancel)
    else:
        data = load_mapset(files.get("maps"),
                           intensity=files.get("intensity"),
                           velocity=files.get("velocity"),
                           intensity_err=files.get("intensity_error"),
                           velocity_err=files.get("velocity_error"),
                           tracer=tracer)
    prov = getattr(data, "provenance", ())
    if not isinstance(prov, (tuple, list)):  # a Cube has one Provenance
        prov = (prov,)
    by_path = {os.path.realpath(p.path): p.sha256 for p in prov
               if getattr(p, "sha256", "") and getattr(p, "path", "")}
    sums = []
    for role, path in files.items():
        digest = by_path.get(os.path.realpath(path)) or file_sha256(path)
        sums.append((role, digest))
    recorded = dict(spec.sha256)
    for role, digest in sums:
        if role in recorded and recorded[role] != digest:
            raise SessionError(
                f"the {role} file changed since the session was saved "
                f"(SHA-256 {digest[:12]}... instead of {recorded[role][:12]}...)",
                path=files[role], keyword=f"input.sha256.{role}",
                hint="the session would not reproduce its result; point it "
                     "at the original file or remove the checksum to accept "
                     "the new one")
    return data, tuple(sorted(sums))


def maps_for(data, session: Session, vsys_kms: float | None = None, *,
             progress: ProgressCallback | None = None,
             cancel: CancelFlag | None = None):
    """The MapSet of the data: itself, or the moment maps of a cube."""
    from .dataset import Cube

    if not isinstance(data, Cube):
        return data
    from .moments import compute_moments

    settings = session.moments
    if vsys_kms is not None and settings.vsys_kms is None:
        settings = settings.replace(vsys_kms=float(vsys_kms))
    if settings.tracer is None and session.tracer:
        settings = settings.replace(tracer=session.tracer)
    return compute_moments(data, settings, progress=progress, cancel=cancel)


def cube_velocities(cube, session: Session) -> np.ndarray:
    """Channel velocities (km/s) with the session's line and convention.

    The same rest value and convention as the moment maps
    (:func:`gyrometer.core.spectral.channel_velocities`), so the cube route
    of the measurement and the maps agree.
    """
    import astropy.units as u

    from .spectral import channel_velocities

    m = session.moments
    rest = (m.rest_value * u.Unit(m.rest_unit or "Hz")
            if m.rest_value is not None else m.line)
    v_kms, _ = channel_velocities(cube.spectral, rest, m.convention,
                                  rest_air=m.rest_air,
                                  air_method=m.air_method)
    return np.asarray(v_kms, dtype=float)


def resolve_geometry(session: Session, maps, *,
                     notes: list[str] | None = None) -> DiskGeometry:
    """The session's geometry, or one estimated from the velocity map.

    The estimate is the global thin-disk fit of
    :func:`gyrometer.core.geometry_estimate.kinematic_geometry`, started from
    the recipe's values when all of centre, PA and inclination are given,
    else from the intensity centroid (or the given centre). The distance and
    the non-zero 1-sigma errors given in the recipe
    (``session.geometry_guess``) are kept: a velocity map cannot tell the
    distance, and errors stated by the user take precedence.
    """
    if session.geometry is not None:
        return session.geometry
    from .geometry_estimate import intensity_centroid, kinematic_geometry

    guess = dict(session.geometry_guess)
    if all(k in guess for k in ("ra_deg", "dec_deg", "pa_deg", "inc_deg")):
        initial = DiskGeometry(ra_deg=guess["ra_deg"], dec_deg=guess["dec_deg"],
                               pa_deg=guess["pa_deg"], inc_deg=guess["inc_deg"],
                               vsys_kms=guess.get("vsys_kms", float(
                                   np.nanmedian(maps.velocity_kms))),
                               source="recipe guess")
        estimate = kinematic_geometry(maps, initial=initial)
    else:
        if "ra_deg" in guess and "dec_deg" in guess:
            start = (guess["ra_deg"], guess["dec_deg"])
        else:
            start = intensity_centroid(maps)
        estimate = kinematic_geometry(maps, center=start)
    geometry = estimate.apply_to(None)
    if notes is not None:
        notes.extend(f"geometry estimate: {n}" for n in estimate.notes)
    keep = {k: v for k, v in guess.items()
            if k == "distance_mpc" or ("_err_" in k and v > 0)}
    if keep:
        geometry = geometry.with_(**keep)
    return geometry


def auto_slits(maps, geometry: DiskGeometry, rule) -> SlitSet:
    """Slits made by a :class:`~gyrometer.core.session.SlitSpec` rule.

    Defaults (common practice, DOMAIN notes section 1): spacing = the PSF
    FWHM (at least two pixels) so that slits are independent; width = the
    spacing; as many slits as fit within half the valid extent in ``Y``
    (odd, 3 to 15), centred on the minor axis. Without a given half-length
    each slit reaches as far as valid data extend on *both* sides of the
    minor axis within its strip, less one pixel, so no slit is cut by the
    field edge.
    """
    from .coords import pixel_scale_arcsec, sky_grid, sky_to_lon
    from .slits import Slit

    scale = pixel_scale_arcsec(maps.wcs)
    psf = maps.psf_fwhm_arcsec or 0.0
    spacing = rule.spacing_arcsec or max(psf, 2.0 * scale)
    width = rule.width_arcsec or spacing
    grid = sky_grid(maps.wcs, maps.shape, geometry.ra_deg, geometry.dec_deg)
    X, Y = sky_to_lon(grid.east_arcsec, grid.north_arcsec, geometry.pa_deg)
    ok = np.isfinite(maps.intensity) & np.isfinite(maps.velocity_kms)
    if not ok.any():
        raise GeometryError("no valid pixel in the maps to place slits on")
    count = rule.count
    if not count:
        y_extent = float(np.max(np.abs(Y[ok])))
        count = 2 * int(0.5 * y_extent / spacing) + 1
        count = int(min(15, max(3, count)))
    base = SlitSet.generate(count, spacing, width,
                            rule.half_length_arcsec or 1.0, symmetric=True)
    if rule.half_length_arcsec:
        return base
    slits = []
    for slit in base:
        strip = ok & (np.abs(Y - slit.offset_arcsec) <= 0.5 * width)
        # whole map rows/columns inside the strip: the edge of the field is
        # where pixels stop, valid or not
        inside = np.abs(Y - slit.offset_arcsec) <= 0.5 * width
        if not strip.any():
            continue
        reach = min(float(np.max(X[inside])), float(-np.min(X[inside])))
        half = reach - 1.5 * scale
        if half > 2.0 * scale:
            slits.append(Slit(slit.offset_arcsec, width, half))
    if len(slits) < 3:
        raise GeometryError("fewer than 3 slits fit inside the field",
                            hint="give [slits] values in the recipe")
    return SlitSet(tuple(slits), symmetric=True)


def resolve_slits(session: Session, maps, geometry: DiskGeometry) -> SlitSet:
    """The session's explicit slits, or slits made by its rule."""
    if session.slits is not None:
        slits = session.slits
    else:
        slits = auto_slits(maps, geometry, session.slit_rule)
    if slits.symmetric != session.symmetric:
        slits = replace(slits, symmetric=session.symmetric)
    return slits


def _rotation(session: Session, maps, geometry: DiskGeometry, progress,
              cancel, notes: list[str]):
    rc = session.rotation
    if rc.source == "none":
        return None, None
    from .rcmodels import choose_model, fit_curve_models
    if rc.source == "file":
        from .rotation import load_rotation_curve
        curve = load_rotation_curve(rc.file,
                                    distance_mpc=geometry.distance_mpc,
                                    radius_unit=rc.radius_unit)
    else:
        from .rotation import tilted_rings
        rings = tilted_rings(maps, geometry, progress=progress, cancel=cancel)
        curve = rings.curve
        skipped = [n for n in rings.notes if "skipped" in n]
        if skipped:
            notes.append(f"rotation curve: {len(skipped)} ring(s) skipped "
                         "(too few pixels or partly outside the field)")
        notes.extend(f"rotation curve: {n}" for n in rings.notes
                     if "skipped" not in n)
    models = None if rc.model == "best" else (rc.model,)
    fits = (fit_curve_models(curve) if models is None
            else fit_curve_models(curve, models=models))
    return curve, choose_model(fits, "bic" if rc.model == "best" else rc.model)


def _bar(session: Session, maps, geometry: DiskGeometry, resonances,
         rng: np.random.Generator, notes: list[str]) -> BarSummary:
    from .bars import estimate_bar_length, rotation_rate, user_bar_length

    bar = session.bar
    if bar.length_arcsec == 0:
        return BarSummary(note="no bar length given")
    try:
        if bar.length_arcsec is None:
            length = estimate_bar_length(maps, geometry)
        else:
            pa = bar.pa_deg
            if bar.on_sky and pa is None:
                pa = estimate_bar_length(maps, geometry).pa_sky_deg
            length = user_bar_length(bar.length_arcsec, bar.length_err_arcsec,
                                     on_sky=bar.on_sky, bar_pa_deg=pa,
                                     geometry=geometry)
    except (FitError, GeometryError) as exc:
        notes.append(f"bar length: {exc}")
        return BarSummary(note=str(exc))
    if resonances is None or "CR" not in resonances.draws_arcsec:
        return BarSummary(length, None, "no corotation radius (no rotation "
                                        "curve), so no R")
    try:
        rate = rotation_rate(resonances.draws_arcsec["CR"],
                             length.length_arcsec, length.err_arcsec, rng)
    except (FitError, GeometryError) as exc:
        notes.append(f"bar rotation rate: {exc}")
        return BarSummary(length, None, str(exc))
    return BarSummary(length, rate)


def _distance_draws(geometry: DiskGeometry, n: int,
                    rng: np.random.Generator) -> np.ndarray | None:
    d = geometry.distance_mpc
    if d is None:
        return None
    if geometry.distance_err_mpc <= 0:
        return np.full(n, d)
    draws = d + geometry.distance_err_mpc * rng.standard_normal(n)
    return np.where(draws > 0, draws, d)


def result_row(session: Session, measurement, budget, resonances,
               bar: BarSummary, *, rng: np.random.Generator | None = None,
               name: str = "") -> ResultRow:
    """The paper-table row of one run.

    Omega_p is the median of the combined Monte Carlo draws with their
    16th/84th percentiles (the fit alone when there is no budget); in
    km/s/kpc each draw is divided by ``kpc_per_arcsec(D)`` with ``D`` drawn
    from its error, so the distance error is included.
    """
    g = measurement.geometry
    if budget is not None and np.size(budget.draws_kms_arcsec):
        draws = np.asarray(budget.draws_kms_arcsec, dtype=float)
        c = budget.combined
        om_arcsec = Estimate(c.median, c.p84 - c.median, c.median - c.p16)
    else:
        draws = None
        err = measurement.omega_p_err_kms_arcsec
        om_arcsec = Estimate(measurement.omega_p_kms_arcsec, err, err)
    om_kpc = Estimate.missing()
    if g.distance_mpc is not None:
        if draws is not None:
            d = _distance_draws(g, draws.size,
                                rng or np.random.default_rng(0))
            om_kpc = Estimate.from_draws(draws / kpc_per_arcsec(d))
        else:
            om_kpc = om_arcsec.scaled(1.0 / kpc_per_arcsec(g.distance_mpc))
    r_cr = r_cr_kpc = Estimate.missing()
    if resonances is not None:
        try:
            cr = resonances.row("CR")
        except KeyError:
            cr = None
        if cr is not None and math.isfinite(cr.median_arcsec):
            r_cr = Estimate(cr.median_arcsec, cr.p84_arcsec - cr.median_arcsec,
                            cr.median_arcsec - cr.p16_arcsec)
            if g.distance_mpc is not None:
                r_cr_kpc = r_cr.scaled(kpc_per_arcsec(g.distance_mpc))
    r_bar = r_bar_kpc = rate = Estimate.missing()
    rate_class = ""
    if bar.length is not None:
        r_bar = Estimate(bar.length.length_arcsec, bar.length.err_arcsec,
                         bar.length.err_arcsec)
        if g.distance_mpc is not None:
            r_bar_kpc = r_bar.scaled(kpc_per_arcsec(g.distance_mpc))
    if bar.rate is not None:
        rate = Estimate(bar.rate.median, bar.rate.p84 - bar.rate.median,
                        bar.rate.median - bar.rate.p16)
        rate_class = bar.rate.classification
    return ResultRow(
        galaxy=name or session.name, tracer=session.tracer,
        route=measurement.route,
        distance_mpc=float("nan") if g.distance_mpc is None else g.distance_mpc,
        inc_deg=g.inc_deg, pa_deg=g.pa_deg, vsys_kms=g.vsys_kms,
        n_slits=int(np.count_nonzero(measurement.used)),
        omega_p_arcsec=om_arcsec, omega_p_kpc=om_kpc,
        omega_p_fit_arcsec=measurement.omega_p_kms_arcsec,
        omega_p_fit_err_arcsec=measurement.omega_p_err_kms_arcsec,
        reduced_chi2=measurement.fit.reduced_chi2,
        r_cr_arcsec=r_cr, r_cr_kpc=r_cr_kpc, r_bar_arcsec=r_bar,
        r_bar_kpc=r_bar_kpc, rate=rate, rate_class=rate_class)


def shifted_budget(budget, shift_kms_arcsec: float):
    """The same budget with every Omega_p value moved by a constant.

    Used for the cube route: the Monte Carlo runs on the moment maps (where
    the noise of each pixel is known) and its spread is attached to the
    measurement made on the cube itself.
    """
    from .results import BudgetTerm, UncertaintyBudget

    d = float(shift_kms_arcsec)
    terms = tuple(BudgetTerm(t.name, t.n_draws, t.p16 + d, t.median + d,
                             t.p84 + d, t.sigma, t.share) for t in budget.terms)
    return UncertaintyBudget(terms, np.asarray(budget.draws_kms_arcsec) + d,
                             budget.seed, budget.distance_mpc)


def _seeds(seed: int) -> list[np.random.SeedSequence]:
    # children: 0 resonances, 1 bar rate, 2 distance draws
    return np.random.SeedSequence([int(seed), 0x6779726F]).spawn(3)


def run_session(session: Session, *, progress: ProgressCallback | None = None,
                cancel: CancelFlag | None = None) -> PipelineResult:
    """Run every step of a session and return the result (nothing written).

    Parameters
    ----------
    session : Session
        From :func:`gyrometer.core.recipe.load_recipe`,
        :func:`gyrometer.core.session.load_session` or built in code.
    progress : callable, optional
        ``progress(done, total, stage)``; see :mod:`gyrometer.core.progress`.
    cancel : object with ``is_set()``, optional
        Checked between and inside the steps.

    Raises
    ------
    GyrometerError
        Bad input, impossible geometry, a fit that cannot be made...
    Cancelled
        ``cancel`` was set.
    """
    from .budget import run_budget
    from .tw import measure

    stages = _Stages(progress, cancel)
    notes: list[str] = []
    p = stages.start("loading data")
    data, sums = load_inputs(session.input, tracer=session.tracer,
                             progress=p, cancel=cancel)
    p = stages.start("moment maps")
    vsys = None
    if session.geometry is not None:
        vsys = session.geometry.vsys_kms
    elif "vsys_kms" in dict(session.geometry_guess):
        vsys = dict(session.geometry_guess)["vsys_kms"]
    maps = maps_for(data, session, vsys, progress=p, cancel=cancel)
    p = stages.start("geometry")
    geometry = resolve_geometry(session, maps, notes=notes)
    stages.start("slits")
    slits = resolve_slits(session, maps, geometry)
    p = stages.start("pattern speed")
    cube_args = {}
    if session.input.kind == "cube":
        half = session.moments.window_halfwidth_kms
        cube_args = dict(window_kms=(-half, half),
                         velocities_kms=cube_velocities(data, session))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # kept in measurement.warnings
        measurement = measure(data, geometry, slits, symmetric=slits.symmetric,
                              tracer=session.tracer, warn=False,
                              progress=p, cancel=cancel, **cube_args)
    notes.extend(measurement.warnings)
    p = stages.start("uncertainty budget")
    if session.input.kind == "cube":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            nominal = measure(maps, geometry, slits, symmetric=slits.symmetric,
                              tracer=session.tracer, warn=False)
    else:
        nominal = measurement
    budget = run_budget(maps, geometry, slits, session.budget,
                        symmetric=slits.symmetric, measurement=nominal,
                        progress=p, cancel=cancel)
    if session.input.kind == "cube":
        shift = (measurement.omega_p_kms_arcsec - nominal.omega_p_kms_arcsec)
        budget = shifted_budget(budget, shift)
        notes.append("cube route: the uncertainty budget was sampled on the "
                     f"moment maps and shifted by {shift:+.4f} km/s/arcsec to "
                     "the measurement on the cube")
    p = stages.start("diagnostics")
    conv, pa_sens = _diagnostics(maps, geometry, slits, notes, p, cancel)
    p = stages.start("rotation curve")
    try:
        curve, curve_fit = _rotation(session, maps, geometry, p, cancel, notes)
    except (RotationCurveError, FitError) as exc:
        if session.rotation.source == "file":
            raise
        notes.append(f"no rotation curve: {exc}")
        curve = curve_fit = None
    seeds = _seeds(session.budget.seed)
    p = stages.start("resonances")
    resonances = None
    if curve_fit is not None:
        from .resonances import resonance_budget
        resonances = resonance_budget(
            curve_fit, budget, rng=np.random.default_rng(seeds[0]),
            n_draws=session.budget.n_draws,
            distance_mpc=geometry.distance_mpc, progress=p, cancel=cancel)
        notes.extend(n for n in resonances.notes if "approximate" in n)
    stages.start("bar")
    bar = _bar(session, maps, geometry, resonances,
               np.random.default_rng(seeds[1]), notes)
    name = session.name or getattr(maps, "name", "") or getattr(data, "name", "")
    resolved = session.with_(
        name=name, geometry=geometry, geometry_guess=(), slits=slits,
        input=replace(session.input, sha256=sums))
    row = result_row(resolved, measurement, budget, resonances, bar,
                     rng=np.random.default_rng(seeds[2]), name=name)
    stages.finish()
    return PipelineResult(resolved, data, maps, measurement, budget, conv,
                          pa_sens, curve, curve_fit, resonances, bar, row,
                          tuple(dict.fromkeys(notes)))


def _diagnostics(maps, geometry, slits, notes, progress, cancel):
    from .diagnostics import convergence, pa_sensitivity

    conv = pa_sens = None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the same facts go into ``notes``
        try:
            conv = convergence(maps, geometry, slits,
                               symmetric=slits.symmetric)
            if not bool(np.all(conv.converged)):
                bad = np.flatnonzero(~np.asarray(conv.converged, dtype=bool))
                notes.append("slit integrals have not converged with slit "
                             f"length for slit(s) {', '.join(map(str, bad))}"
                             " (Zou et al. 2019: they must plateau)")
        except FitError as exc:
            notes.append(f"convergence curves: {exc}")
        report(progress, 1, 2, "diagnostics")
        check_cancel(cancel, "diagnostics")
        try:
            pa_sens = pa_sensitivity(maps, geometry, slits,
                                     np.asarray(PA_OFFSETS_DEG),
                                     symmetric=slits.symmetric)
        except FitError as exc:
            notes.append(f"PA sensitivity: {exc}")
        report(progress, 2, 2, "diagnostics")
    return conv, pa_sens


# -- outputs ------------------------------------------------------------------
def _stem(result: PipelineResult) -> str:
    stem = result.session.output.stem or result.name or "gyrometer"
    return re.sub(r"[^A-Za-z0-9._+-]+", "_", stem).strip("._") or "gyrometer"


def result_details(result: PipelineResult) -> dict:
    """JSON-like details stored with the table: slits, budget, resonances."""
    ig = result.measurement.integrals
    slits = [{"offset_arcsec": float(ig.offset_arcsec[k]),
              "x_mean_arcsec": float(ig.x_mean_arcsec[k]),
              "x_err_arcsec": float(ig.x_err_arcsec[k]),
              "v_mean_kms": float(ig.v_mean_kms[k]),
              "v_err_kms": float(ig.v_err_kms[k]),
              "used": bool(result.measurement.used[k]),
              "truncated": bool(ig.truncated[k])}
             for k in range(ig.n_slits)]
    fit = result.measurement.fit
    details: dict[str, Any] = {
        "fit": {"slope_kms_arcsec": fit.slope, "slope_err": fit.slope_err,
                "intercept_kms": fit.intercept,
                "intercept_err": fit.intercept_err, "chi2": fit.chi2,
                "dof": fit.dof, "method": fit.method},
        "slits": slits,
        "warnings": list(result.warnings),
    }
    if result.budget is not None:
        details["budget_kms_arcsec"] = [
            {"term": t.name, "n_draws": t.n_draws, "p16": t.p16,
             "median": t.median, "p84": t.p84, "sigma": t.sigma,
             "share": t.share} for t in result.budget.terms]
    if result.resonances is not None:
        details["resonances_arcsec"] = [
            {"name": r.name, "m": r.m, "status": r.status,
             "radius": r.radius_arcsec, "median": r.median_arcsec,
             "p16": r.p16_arcsec, "p84": r.p84_arcsec,
             "fraction_found": r.fraction_found}
            for r in result.resonances.rows]
        details["rotation_curve_model"] = result.resonances.model
    if result.bar.length is not None:
        details["bar_length_method"] = result.bar.length.method
    if result.bar.rate is not None:
        details["rate_class_boundaries"] = result.bar.rate.boundaries_source
    return details


def results_table(result: PipelineResult):
    """One-row results table with full metadata (see :mod:`gyrometer.core.tables`)."""
    from .tables import result_table

    inputs = [{"role": role, "path": result.session.input.files().get(role, ""),
               "sha256": digest} for role, digest in result.session.input.sha256]
    return result_table(result.row, inputs=inputs,
                        settings=session_to_dict(result.session),
                        seed=result.session.budget.seed,
                        extra=result_details(result))


def output_paths(result: PipelineResult, folder: str | os.PathLike | None = None
                 ) -> dict[str, Path]:
    """Every file :func:`export_result` writes, keyed by kind."""
    out = result.session.output
    base = Path(folder if folder is not None else out.folder)
    stem = _stem(result)
    paths: dict[str, Path] = {}
    for fmt in out.tables:
        paths[f"table.{fmt}"] = base / f"{stem}.{fmt}"
    for kind in out.figure_kinds:
        if kind == "rotation" and result.curve_fit is None:
            continue
        if kind == "convergence" and result.convergence is None:
            continue
        if kind == "pa" and result.pa_sensitivity is None:
            continue
        for fmt in out.figures:
            paths[f"figure.{kind}.{fmt}"] = base / f"{stem}_{kind}.{fmt}"
    if out.regions != "none":
        suffix = ".reg" if out.regions == "ds9" else ".crtf"
        paths["regions"] = base / f"{stem}_slits{suffix}"
    if out.session:
        paths["session"] = base / f"{stem}.session.toml"
    return paths


def export_result(result: PipelineResult, folder: str | os.PathLike | None = None,
                  *, overwrite: bool = False,
                  progress: ProgressCallback | None = None,
                  cancel: CancelFlag | None = None) -> dict[str, Path]:
    """Write tables, figures, slit regions and the session file.

    All targets are checked first (an existing file without ``overwrite``
    stops the export before anything is written); everything is written
    into a hidden staging folder next to the targets and moved into place
    only when every file is complete, so a failure or a cancel leaves the
    output folder as it was.

    Returns
    -------
    dict
        Kind -> path of every file written.
    """
    from .figures import FIGURES, save_figure
    from .regionfiles import write_slit_regions
    from .safeio import check_writable
    from .tables import write_csv, write_ecsv, write_json, write_latex

    paths = output_paths(result, folder)
    for path in paths.values():
        check_writable(path, overwrite)
    base = next(iter(paths.values())).parent if paths else Path(".")
    try:
        base.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the output folder ({exc.strerror})",
                          path=str(base)) from exc
    staging = Path(tempfile.mkdtemp(prefix=".gyrometer-staging-", dir=base))
    try:
        table = results_table(result) if result.session.output.tables else None
        figures_cache: dict[str, Any] = {}
        for k, (kind, final) in enumerate(paths.items()):
            check_cancel(cancel, "writing outputs")
            report(progress, k, len(paths), "writing outputs")
            tmp = staging / final.name
            if kind.startswith("table."):
                fmt = kind.split(".", 1)[1]
                if fmt == "ecsv":
                    write_ecsv(table, tmp)
                elif fmt == "csv":
                    write_csv(table, tmp)
                elif fmt == "json":
                    write_json(table, tmp)
                else:
                    write_latex(table, tmp,
                                style=result.session.output.latex_style)
            elif kind.startswith("figure."):
                _, fig_kind, _fmt = kind.split(".")
                if fig_kind not in figures_cache:
                    figures_cache[fig_kind] = FIGURES[fig_kind](result)
                save_figure(figures_cache[fig_kind], tmp)
            elif kind == "regions":
                write_slit_regions(tmp, result.session.slits,
                                   result.session.geometry)
            elif kind == "session":
                save_session(result.session, tmp)
        check_cancel(cancel, "writing outputs")
        for kind, final in paths.items():
            check_writable(final, overwrite)
        for kind, final in paths.items():
            os.replace(staging / final.name, final)
        report(progress, len(paths), len(paths), "writing outputs")
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return paths

