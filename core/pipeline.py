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

Two optional routes ride on the same steps:

* ``[radial] enabled = true``: the pattern speed against radius
  (:func:`gyrometer.core.radial.measure_radial`, Merrifield, Rand & Meidt
  2006; Meidt et al. 2008) with the same slits, on the maps (the moment
  maps for a cube); :attr:`PipelineResult.radial`.
* ``[input] kind = "absorption"``: slit spectra of an absorption-line cube
  (:func:`gyrometer.core.stellar.measure_absorption`);
  :attr:`PipelineResult.absorption`. Its maps are the continuum image of
  the cube (no velocity map), so the geometry must be given, the
  convergence and PA panels and a derived rotation curve are not made, and
  the uncertainty budget is :func:`absorption_budget`.

When the rotation curve is derived with tilted rings, the rings inside the
bar (deprojected bar semi-length, given or estimated) are flagged before the
smooth model is fitted: inside a bar the tracer's rotation speed is not the
circular speed (DOMAIN notes section 3; Spekkens & Sellwood 2007).

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

from .budget import summarise_term
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
    "continuum_maps",
    "absorption_budget",
    "run_session",
    "result_row",
    "result_details",
    "results_table",
    "radial_details",
    "radial_rng",
    "absorption_details",
    "radial_results_table",
    "write_radial_table",
    "output_paths",
    "export_result",
]

#: Stage names reported to ``progress`` (in order).
STAGES = ("loading data", "moment maps", "geometry", "slits",
          "pattern speed", "uncertainty budget", "diagnostics",
          "radial pattern speeds", "rotation curve", "resonances", "bar")

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
    radial : RadialResult or None
        Pattern speed against radius (``[radial] enabled``), see
        :class:`gyrometer.core.radial.RadialResult`.
    absorption : AbsorptionResult or None
        The absorption-line route's full result (per-slit spectra and fits,
        template, noise draws), see
        :class:`gyrometer.core.stellar.AbsorptionResult`;
        ``measurement`` is its ``measurement``.
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
    radial: Any = None
    absorption: Any = None

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
    if spec.kind in ("cube", "absorption"):
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
    """The MapSet of the data: itself, the moment maps of a cube, or the
    continuum image of an absorption-line cube (:func:`continuum_maps`)."""
    from .dataset import Cube

    if not isinstance(data, Cube):
        return data
    if session.input.kind == "absorption":
        return continuum_maps(data, session.absorption.stellar,
                              tracer=session.tracer, progress=progress,
                              cancel=cancel)
    from .moments import compute_moments

    settings = session.moments
    if vsys_kms is not None and settings.vsys_kms is None:
        settings = settings.replace(vsys_kms=float(vsys_kms))
    if settings.tracer is None and session.tracer:
        settings = settings.replace(tracer=session.tracer)
    return compute_moments(data, settings, progress=progress, cancel=cancel)


def continuum_maps(cube, stellar, *, tracer: str = "stars",
                   progress: ProgressCallback | None = None,
                   cancel: CancelFlag | None = None):
    """Continuum image of an absorption-line cube, as a MapSet.

    The intensity is the sum of the channels in the continuum band (or
    the fit window, or the whole cube less 1 % at each end, as
    :func:`gyrometer.core.stellar.measure_absorption` chooses) times the
    channel width, i.e. intensity unit x Angstrom; its error comes from the
    variance. A spaxel with a NaN in any channel of the band is NaN. The
    velocity map is all NaN: this route has none. Used for the slits, the
    bar length and the map figure.
    """
    import astropy.units as u

    from .dataset import MapSet

    axis = cube.spectral
    try:
        wave = (np.asarray(axis.values, float)
                * u.Unit(axis.unit or "Angstrom")).to_value(u.AA)
    except (ValueError, u.UnitsError) as exc:
        raise GeometryError("the absorption route needs a wavelength axis",
                            path=cube.provenance.path or None,
                            keyword="CUNIT3", value=axis.unit) from exc
    lo, hi = float(np.min(wave)), float(np.max(wave))
    band = (stellar.continuum_band_A or stellar.fit_window_A
            or (lo + 0.01 * (hi - lo), hi - 0.01 * (hi - lo)))
    chans = np.flatnonzero((wave >= band[0]) & (wave <= band[1]))
    if chans.size == 0:
        from .errors import DataContentError
        raise DataContentError("the continuum band lies outside the cube",
                               path=cube.provenance.path or None,
                               keyword="continuum_band_A", value=band,
                               hint=f"the cube covers {lo:.1f}-{hi:.1f} Angstrom")
    width = np.abs(np.gradient(wave))
    ny, nx = cube.spatial_shape
    total = np.zeros((ny, nx))
    var = None if cube.variance is None else np.zeros((ny, nx))
    step = 128
    for k0 in range(0, chans.size, step):
        check_cancel(cancel, "continuum image")
        idx = chans[k0:k0 + step]
        w = width[idx][:, None, None]
        total += np.sum(np.asarray(cube.data[idx], float) * w, axis=0)
        if var is not None:
            var += np.sum(np.asarray(cube.variance[idx], float) * w ** 2, axis=0)
        report(progress, min(k0 + step, chans.size), chans.size,
               "continuum image")
    return MapSet(intensity=total, velocity_kms=np.full((ny, nx), np.nan),
                  wcs=cube.wcs.celestial,
                  intensity_err=None if var is None else np.sqrt(
                      np.clip(var, 0.0, None)),
                  intensity_unit=f"({cube.unit}) Angstrom" if cube.unit else "",
                  name=cube.name, tracer=tracer,
                  psf_fwhm_arcsec=cube.psf_fwhm_arcsec,
                  provenance=(cube.provenance,))


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
    ok = np.isfinite(maps.intensity)
    velocity_ok = np.isfinite(maps.velocity_kms)
    if velocity_ok.any():  # the continuum maps of the absorption route have none
        ok &= velocity_ok
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
        prov = tuple(getattr(maps, "provenance", ()) or ())
        raise GeometryError("fewer than 3 slits fit inside the field",
                            path=(prov[0].path or None) if prov else None,
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
              cancel, notes: list[str], bar_length_arcsec: float | None = None):
    rc = session.rotation
    if rc.source == "none":
        return None, None
    if rc.source == "derived" and maps is not None and not np.isfinite(
            np.asarray(maps.velocity_kms)).any():
        notes.append("no rotation curve: there is no velocity map to derive "
                     "it from (give [rotation_curve] source = 'file')")
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
        flagged_bar = False
        if bar_length_arcsec:
            before = curve
            curve = _flag_bar_zone(curve, bar_length_arcsec, notes)
            flagged_bar = curve is not before
        # the advice to flag the bar zone is done when the bar was flagged
        notes.extend(f"rotation curve: {n}" for n in rings.notes
                     if "skipped" not in n
                     and not (flagged_bar and "with_flags" in n))
    models = None if rc.model == "best" else (rc.model,)
    fits = (fit_curve_models(curve) if models is None
            else fit_curve_models(curve, models=models))
    return curve, choose_model(fits, "bic" if rc.model == "best" else rc.model)


def _flag_bar_zone(curve, bar_length_arcsec: float, notes: list[str]):
    """Flag tilted-ring points inside the bar before a model is fitted.

    Inside a bar the tracer streams along the bar and its mean rotation is
    not the circular speed (DOMAIN notes section 3; Spekkens & Sellwood
    2007, ApJ 664, 204), so those rings are kept for display but left out
    of the smooth model (:func:`gyrometer.core.rcmodels.fit_curve_models`
    skips flagged points). Nothing is flagged when fewer than three rings
    would remain.
    """
    inside = np.asarray(curve.r_arcsec) <= bar_length_arcsec
    flags = np.asarray(curve.flagged, dtype=bool) | inside
    if not inside.any():
        return curve
    if np.count_nonzero(~flags) < 3:
        notes.append("rotation curve: the rings inside the bar were NOT "
                     "flagged (fewer than 3 rings would remain outside it); "
                     "the model uses rings where the rotation is not the "
                     "circular speed")
        return curve
    reason = ", ".join(r for r in (curve.flag_reason,
                                   f"inside the bar (R <= {bar_length_arcsec:.1f}"
                                   " arcsec): rotation is not circular")
                       if r)
    notes.append(f"rotation curve: {int(inside.sum())} ring(s) inside the bar "
                 f"(R <= {bar_length_arcsec:.1f} arcsec) flagged and left out "
                 "of the model fit")
    return curve.with_flags(flags, reason)


def _bar_length(session: Session, maps, geometry: DiskGeometry,
                notes: list[str]):
    """The deprojected bar length (BarLength), or ``(None, reason)``."""
    from .bars import estimate_bar_length, user_bar_length

    bar = session.bar
    if bar.length_arcsec == 0:
        return None, "no bar length given"
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
        return None, str(exc)
    return length, ""


def _bar(length, reason: str, resonances, rng: np.random.Generator,
         notes: list[str]) -> BarSummary:
    from .bars import rotation_rate

    if length is None:
        return BarSummary(note=reason)
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
    # children: 0 resonances, 1 bar rate, 2 distance draws, 3 radial Monte
    # Carlo, 4 absorption route (noise draws, budget). SeedSequence children
    # are keyed by their index, so adding children keeps the first three.
    return np.random.SeedSequence([int(seed), 0x6779726F]).spawn(5)


def absorption_budget(cube, geometry: DiskGeometry, slits: SlitSet, absorption,
                      session: Session, seed_seq: np.random.SeedSequence, *,
                      notes: list[str] | None = None,
                      progress: ProgressCallback | None = None,
                      cancel: CancelFlag | None = None):
    """Uncertainty budget of the absorption-line route.

    Terms (switched by the session's ``[uncertainty] terms``):

    * ``"noise"``: the noise Monte Carlo of the slit spectra,
      :attr:`AbsorptionResult.omega_p_draws_kms_arcsec` (every draw refits
      all slits and the line; Aguerri et al. 2015 practice);
    * ``"slit bootstrap"``: slits resampled with replacement, York fit of
      the nominal ``<X>``, ``<V>`` with their errors (common practice);
    * ``"position angle"``, ``"centre"``: the whole measurement *redone*
      ``[stellar] geometry_draws`` times with the PA, respectively the
      centre (east and north, each with sigma ``center_err_arcsec``), drawn
      from their errors, the template held fixed and no noise draws;
    * ``"inclination"``: ``Omega_p = slope / sin i`` with ``i`` drawn
      (no refit needed);
    * ``"all combined"``: ``n_draws`` sums of the nominal value and one
      deviation from its median drawn (with replacement) from each term.
      The terms are not sampled jointly here, so this assumes their effects
      add; with few geometry draws their tails are coarse.
    """
    from dataclasses import replace as _replace

    from .results import BudgetTerm, UncertaintyBudget
    from .stellar import measure_absorption
    from .yorkfit import york_slopes

    b = session.budget
    n = int(b.n_draws)
    m = absorption.measurement
    nominal = float(m.omega_p_kms_arcsec)
    rng_boot, rng_geo, rng_inc, rng_comb = (
        np.random.default_rng(c) for c in seed_seq.spawn(4))
    notes = notes if notes is not None else []
    draws: dict[str, np.ndarray] = {}
    if b.noise:
        noise = np.asarray(absorption.omega_p_draws_kms_arcsec, float)
        if np.count_nonzero(np.isfinite(noise)) >= 2:
            draws["noise"] = noise
        else:
            notes.append("absorption budget: no noise term ([stellar] n_mc "
                         "= 0 or the draws failed)")
    used = np.flatnonzero(m.used)
    ig = m.integrals
    if b.bootstrap and used.size >= 3:
        pick = used[rng_boot.integers(0, used.size, size=(n, used.size))]
        with np.errstate(all="ignore"):
            slopes = york_slopes(ig.x_mean_arcsec[pick], ig.v_mean_kms[pick],
                                 ig.x_err_arcsec[pick], ig.v_err_kms[pick])
        draws["slit bootstrap"] = np.asarray(slopes, float) / geometry.sin_i
    k_geo = int(session.absorption.geometry_draws)
    pa_err = b.pa_err_deg if b.pa_err_deg is not None else geometry.pa_err_deg
    c_err = (b.center_err_arcsec if b.center_err_arcsec is not None
             else geometry.center_err_arcsec)
    i_err = b.inc_err_deg if b.inc_err_deg is not None else geometry.inc_err_deg
    redo = []
    if b.position_angle and pa_err > 0 and k_geo >= 2:
        redo.append("position angle")
    if b.centre and c_err > 0 and k_geo >= 2:
        redo.append("centre")
    quiet = _replace(absorption.settings, n_mc=0)
    total = len(redo) * k_geo
    done = 0
    for name in redo:
        values = np.full(k_geo, np.nan)
        for j in range(k_geo):
            check_cancel(cancel, "uncertainty budget")
            if name == "position angle":
                g = geometry.with_(pa_deg=geometry.pa_deg
                                   + pa_err * rng_geo.standard_normal())
            else:
                de, dn = c_err * rng_geo.standard_normal(2)
                cos_d = math.cos(math.radians(geometry.dec_deg))
                g = geometry.with_(ra_deg=geometry.ra_deg + de / 3600.0 / cos_d,
                                   dec_deg=geometry.dec_deg + dn / 3600.0)
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    r = measure_absorption(cube, g, slits, quiet,
                                           template=absorption.template,
                                           warn=False)
                values[j] = r.measurement.omega_p_kms_arcsec
            except (FitError, GeometryError) as exc:
                notes.append(f"absorption budget: a {name} draw failed ({exc})")
            done += 1
            report(progress, done, total, f"geometry re-measurements ({name})")
        draws[name] = values
    if b.inclination and i_err > 0:
        inc = geometry.inc_deg + i_err * rng_inc.standard_normal(n)
        sin_i = np.sin(np.radians(np.clip(inc, 1.0, 89.0)))
        draws["inclination"] = m.fit.slope / sin_i
    if not draws:
        return None
    terms = [summarise_term(name, d) for name, d in draws.items()]
    combined = np.full(n, nominal)
    for t, d in zip(terms, draws.values()):
        d = np.asarray(d, float)
        d = d[np.isfinite(d)]
        combined += rng_comb.choice(d, size=n, replace=True) - t.median
    total_var = sum(t.sigma ** 2 for t in terms)
    terms = [BudgetTerm(t.name, t.n_draws, t.p16, t.median, t.p84, t.sigma,
                        t.sigma ** 2 / total_var if total_var > 0 else 0.0)
             for t in terms]
    all_term = summarise_term("all combined", combined)
    terms.append(BudgetTerm(all_term.name, all_term.n_draws, all_term.p16,
                            all_term.median, all_term.p84, all_term.sigma, 1.0))
    sampled = ", ".join(f"{t.name} ({t.n_draws} draws)" for t in terms[:-1])
    notes.append("absorption route: uncertainty terms sampled: " + sampled
                 + "; position angle and centre by re-measuring the slit "
                 "spectra, combined by adding one deviation of each term per "
                 "draw (terms assumed independent)")
    return UncertaintyBudget(tuple(terms), combined, int(b.seed),
                             geometry.distance_mpc)


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
    seeds = _seeds(session.budget.seed)
    kind = session.input.kind
    absorption = None
    if kind == "absorption":
        absorption = _measure_absorption(data, geometry, slits, session,
                                         seeds[4], p, cancel)
        measurement = absorption.measurement
    else:
        cube_args = {}
        if kind == "cube":
            half = session.moments.window_halfwidth_kms
            cube_args = dict(window_kms=(-half, half),
                             velocities_kms=cube_velocities(data, session))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # kept in measurement.warnings
            measurement = measure(data, geometry, slits,
                                  symmetric=slits.symmetric,
                                  tracer=session.tracer, warn=False,
                                  progress=p, cancel=cancel, **cube_args)
    notes.extend(measurement.warnings)
    p = stages.start("uncertainty budget")
    if kind == "absorption":
        budget = absorption_budget(data, geometry, slits, absorption, session,
                                   seeds[4].spawn(2)[1], notes=notes,
                                   progress=p, cancel=cancel)
    else:
        if kind == "cube":
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                nominal = measure(maps, geometry, slits,
                                  symmetric=slits.symmetric,
                                  tracer=session.tracer, warn=False)
        else:
            nominal = measurement
        budget = run_budget(maps, geometry, slits, session.budget,
                            symmetric=slits.symmetric, measurement=nominal,
                            progress=p, cancel=cancel)
        if kind == "cube":
            shift = (measurement.omega_p_kms_arcsec
                     - nominal.omega_p_kms_arcsec)
            budget = shifted_budget(budget, shift)
            notes.append("cube route: the uncertainty budget was sampled on "
                         f"the moment maps and shifted by {shift:+.4f} "
                         "km/s/arcsec to the measurement on the cube")
    p = stages.start("diagnostics")
    if kind == "absorption":
        conv = pa_sens = None
        notes.append("absorption route: no convergence or PA-sensitivity "
                      "curves (they need a velocity map; the PA term of the "
                      "budget re-measures the spectra instead)")
    else:
        conv, pa_sens = _diagnostics(maps, geometry, slits, notes, p, cancel)
    p = stages.start("radial pattern speeds")
    radial = _radial(session, maps, geometry, slits, notes, p,
                     cancel)
    p = stages.start("rotation curve")
    length, length_note = _bar_length(session, maps, geometry, notes)
    try:
        curve, curve_fit = _rotation(
            session, maps, geometry, p, cancel, notes,
            bar_length_arcsec=None if length is None else length.length_arcsec)
    except (RotationCurveError, FitError) as exc:
        if session.rotation.source == "file":
            raise
        notes.append(f"no rotation curve: {exc}")
        curve = curve_fit = None
    p = stages.start("resonances")
    resonances = None
    if curve_fit is not None and budget is not None:
        from .resonances import resonance_budget
        resonances = resonance_budget(
            curve_fit, budget, rng=np.random.default_rng(seeds[0]),
            n_draws=session.budget.n_draws,
            distance_mpc=geometry.distance_mpc, progress=p, cancel=cancel)
        notes.extend(n for n in resonances.notes if "approximate" in n)
    stages.start("bar")
    bar = _bar(length, length_note, resonances,
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
                          tuple(dict.fromkeys(notes)), radial=radial,
                          absorption=absorption)


def _measure_absorption(cube, geometry: DiskGeometry, slits: SlitSet,
                        session: Session, seed_seq: np.random.SeedSequence,
                        progress, cancel):
    """Slit spectra of an absorption-line cube (the session's seed drives
    the noise draws; ``[stellar]`` holds the other settings)."""
    from .stellar import measure_absorption

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # kept in measurement.warnings
        return measure_absorption(
            cube, geometry, slits, session.absorption.stellar,
            rng=np.random.default_rng(seed_seq.spawn(2)[0]),
            symmetric=slits.symmetric, warn=False, progress=progress,
            cancel=cancel)


def radial_rng(seed: int) -> np.random.Generator:
    """The generator of the radial Monte Carlo for a session seed.

    The pipeline and the desktop app's on-request radial measurement both
    use it, so the same session gives the same Omega_p(R) errors in both.
    """
    return np.random.default_rng(_seeds(seed)[3])


def _radial(session: Session, maps, geometry: DiskGeometry, slits: SlitSet,
            notes: list[str], progress, cancel):
    """Omega_p(R) with the session's slits, or None (disabled or failed)."""
    if session.radial is None:
        return None
    if session.input.kind == "absorption":
        notes.append("pattern speed against radius: not measured (the "
                     "absorption route has no velocity map)")
        return None
    from .errors import Cancelled, GyrometerError
    from .radial import measure_radial

    if session.input.kind == "cube":
        notes.append("pattern speed against radius: measured on the moment "
                     "maps of the cube")
    try:
        result = measure_radial(maps, geometry, slits, session.radial,
                                rng=radial_rng(session.budget.seed),
                                progress=progress, cancel=cancel, warn=False)
    except Cancelled:
        raise
    except GyrometerError as exc:
        notes.append(f"pattern speed against radius: {exc}")
        return None
    notes.extend(f"pattern speed against radius: {n}" for n in result.warnings)
    return result


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
                             f"length for slit(s) {', '.join(str(k + 1) for k in bad)}"
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
    details["route"] = result.row.route
    if result.rotation_curve is not None and bool(
            np.any(result.rotation_curve.flagged)):
        details["rotation_curve_flagged"] = {
            "r_arcsec": [float(r) for r in np.asarray(
                result.rotation_curve.r_arcsec)[result.rotation_curve.flagged]],
            "reason": result.rotation_curve.flag_reason}
    if result.radial is not None:
        details["radial"] = radial_details(result.radial)
    if result.absorption is not None:
        details["absorption"] = absorption_details(result)
    return details


def radial_details(radial) -> dict:
    """JSON-like summary of a :class:`~gyrometer.core.radial.RadialResult`
    (stored under ``details.radial`` of the results metadata)."""
    out: dict[str, Any] = {
        "method": "radial Tremaine-Weinberg (Merrifield, Rand & Meidt 2006; "
                  "Meidt et al. 2008)",
        "edges_arcsec": [float(e) for e in radial.edges_arcsec],
        "omega_p_kms_arcsec": [float(v) for v in radial.omega_kms_arcsec],
        "omega_p_err_kms_arcsec": [float(v) for v in
                                   radial.omega_err_kms_arcsec],
        "resolution": [float(v) for v in radial.resolution],
        "regularisation": radial.regularisation, "lam": float(radial.lam),
        "lam_method": radial.lam_method, "chi2": float(radial.chi2),
        "dof": float(radial.dof), "error_method": radial.error_method,
        "mean_omega_p_kms_arcsec": float(radial.mean_omega_kms_arcsec),
        "mean_omega_p_err_kms_arcsec": float(radial.mean_omega_err_kms_arcsec),
        "vsys_offset_kms": radial.vsys_offset_kms,
        "vsys_offset_err_kms": radial.vsys_offset_err_kms,
    }
    if radial.omega_kms_kpc is not None:
        out["edges_kpc"] = [float(e) for e in radial.edges_kpc]
        out["omega_p_kms_kpc"] = [float(v) for v in radial.omega_kms_kpc]
        out["omega_p_err_kms_kpc"] = [float(v) for v in
                                      radial.omega_err_kms_kpc]
    return out


def absorption_details(result: PipelineResult) -> dict:
    """JSON-like summary of the absorption-line route: settings used and
    one entry per slit spectrum fit."""
    a = result.absorption
    st = a.settings
    return {
        "template": a.template.origin,
        "fit_window_A": None if st.fit_window_A is None else list(st.fit_window_A),
        "continuum_band_A": (None if st.continuum_band_A is None
                             else list(st.continuum_band_A)),
        "losvd": st.losvd, "n_hermite": st.n_hermite,
        "multiplicative_degree": st.multiplicative_degree,
        "additive_degree": st.additive_degree,
        "n_mc": st.n_mc,
        "geometry_draws": result.session.absorption.geometry_draws,
        "slit_fits": [{"mean_velocity_kms": f.mean_velocity_kms,
                       "mean_velocity_err_kms": f.mean_velocity_err_kms,
                       "sigma_kms": f.sigma_kms,
                       "reduced_chi2": f.reduced_chi2, "snr": f.snr,
                       "message": f.message} for f in a.slit_fits],
    }


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
    if result.radial is not None and out.tables:
        paths["radial.ecsv"] = base / f"{stem}_radial.ecsv"
    for kind in out.figure_kinds:
        if kind == "rotation" and result.curve_fit is None:
            continue
        if kind == "radial" and result.radial is None:
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


def radial_results_table(result: PipelineResult):
    """Per-annulus table of Omega_p(R) (:func:`gyrometer.core.radial.radial_table`)
    with the galaxy, route and tracer in its metadata."""
    from .radial import radial_table

    table = radial_table(result.radial)
    table.meta.update({"galaxy": result.name, "route": result.row.route,
                       "tracer": result.row.tracer,
                       "maps": ("moment maps of the cube"
                                if result.row.route == "cube" else "maps")})
    return table


def write_radial_table(result: PipelineResult, path: str | os.PathLike,
                       overwrite: bool = False) -> Path:
    """Write :func:`radial_results_table` as ECSV, atomically."""
    from .safeio import atomic_output

    table = radial_results_table(result)
    with atomic_output(path, overwrite, suffix=".ecsv") as tmp:
        table.write(tmp, format="ascii.ecsv")
    return Path(path)


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
            elif kind == "radial.ecsv":
                write_radial_table(result, tmp)
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

