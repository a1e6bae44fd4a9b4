"""Recipes: the TOML file a user writes to run a whole measurement.

A recipe has the sections and keys of a session file (see
:data:`gyrometer.core.session.SCHEMA`) without the ``[gyrometer-session]``
table. Relative paths are relative to the recipe's own folder, so a recipe
travels with its data. :func:`load_recipe` checks every value's type,
refuses unknown sections and keys (suggesting the closest known name) and
missing input files, raising :class:`~gyrometer.core.errors.RecipeError`
whose ``keyword`` is the dotted key (``"geometry.pa_deg"``).
:func:`starter_recipe` writes a recipe for a data file with every setting
present and commented, filled with cheap estimates from the data.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from .errors import GyrometerError, RecipeError
from .session import (_TERM_FLAGS, SCHEMA, SESSION_SCHEMA, KeySpec, Session,
                      _toml_value,
                      load_session, read_toml, session_from_dict)

__all__ = ["load_recipe", "load_any", "check_recipe", "describe_session",
           "starter_recipe"]


def load_recipe(path: str | os.PathLike, *, check_files: bool = True
                ) -> Session:
    """Read and validate a recipe file.

    Parameters
    ----------
    path : path-like
        The TOML recipe.
    check_files : bool
        Require the input files to exist.

    Raises
    ------
    RecipeError
        Invalid TOML, a wrong type, an unknown key, a missing file; the
        message names the file and the dotted key.
    """
    p = Path(path)
    doc = read_toml(p, RecipeError)
    if SESSION_SCHEMA in doc:
        raise RecipeError(f"this is a session file ([{SESSION_SCHEMA}])",
                          path=str(p), keyword=SESSION_SCHEMA,
                          hint="load it with load_session, or use "
                               "load_any, which accepts both")
    return session_from_dict(doc, base_dir=p.resolve().parent,
                             source=str(p), check_files=check_files)


def load_any(path: str | os.PathLike, *, check_files: bool = True) -> Session:
    """Read a recipe or a session file (told apart by the session table)."""
    p = Path(path)
    doc = read_toml(p, RecipeError)
    if SESSION_SCHEMA in doc:
        session = load_session(p)
        if check_files:
            from .session import _check_files, SessionError
            _check_files(session.input, session.rotation, str(p),
                         SessionError)
        return session
    return session_from_dict(doc, base_dir=p.resolve().parent,
                             source=str(p), check_files=check_files)


def describe_session(session: Session) -> list[str]:
    """Plain-language lines saying what a run of ``session`` will do."""
    lines = []
    inp = session.input
    files = ", ".join(f"{r}={Path(p).name}" for r, p in inp.files().items())
    lines.append(f"galaxy: {session.name or '(name from the data)'}, "
                 f"tracer: {session.tracer}")
    lines.append(f"input: {inp.kind} ({files})")
    g = session.geometry
    if g is None:
        lines.append("geometry: estimated from the velocity map")
    else:
        dist = "no distance" if g.distance_mpc is None else \
            f"D = {g.distance_mpc:g} Mpc"
        lines.append(f"geometry: PA = {g.pa_deg:g} deg, i = {g.inc_deg:g} "
                     f"deg, Vsys = {g.vsys_kms:g} km/s, {dist}")
    if session.slits is not None:
        lines.append(f"slits: {len(session.slits)} given explicitly")
    else:
        r = session.slit_rule
        lines.append("slits: " + (f"{r.count}" if r.count else "automatic "
                                  "number of") + " slits"
                     + ("" if not r.spacing_arcsec else
                        f", spacing {r.spacing_arcsec:g} arcsec"))
    b = session.budget
    terms = [t for t, flag in _TERM_FLAGS.items() if getattr(b, flag)]
    lines.append(f"uncertainty: {b.n_draws} draws per source, seed {b.seed}, "
                 f"sources: {', '.join(terms) or 'none'}")
    rc = session.rotation
    lines.append("rotation curve: " + {"derived": "fitted to the velocity map",
                                       "file": f"from {rc.file}",
                                       "none": "none (no resonances)"}[rc.source]
                 + ("" if rc.source == "none" else f", {rc.model} model"))
    bar = session.bar
    if bar.length_arcsec is None:
        text = "estimated from the intensity map (Fourier analysis)"
    elif bar.length_arcsec == 0:
        text = "none (no R)"
    else:
        text = f"{bar.length_arcsec:g} +- {bar.length_err_arcsec:g} arcsec " + (
            f"on the sky at PA {bar.pa_deg:g} deg, deprojected" if bar.on_sky
            and bar.pa_deg is not None else "on the sky, PA estimated, "
            "deprojected" if bar.on_sky else "deprojected")
    lines.append("bar length: " + text)
    if inp.kind == "absorption":
        st = session.absorption.stellar
        window = ("the whole cube" if st.fit_window_A is None else
                  f"{st.fit_window_A[0]:g}-{st.fit_window_A[1]:g} Angstrom")
        lines.append(f"absorption lines: slit spectra fitted over {window}, "
                     f"template {st.template}, {st.n_mc} noise draws per "
                     f"slit, {session.absorption.geometry_draws} geometry "
                     "re-measurements per term")
    rad = session.radial
    if rad is None:
        lines.append("pattern speed against radius: not measured")
    else:
        annuli = (f"{len(rad.edges_arcsec) - 1} annuli with given edges"
                  if rad.edges_arcsec else f"{rad.n_annuli} equal annuli"
                  if rad.n_annuli else "one annulus per slit pair")
        lines.append(f"pattern speed against radius: {annuli}, "
                     f"{rad.regularisation}, lam = {rad.lam}")
    out = session.output
    lines.append(f"outputs: {out.folder} ({', '.join(out.tables)}; figures: "
                 f"{', '.join(out.figures) or 'none'})")
    return lines


def check_recipe(path: str | os.PathLike) -> tuple[Session, list[str]]:
    """Validate a recipe or session without running it.

    Returns the session and :func:`describe_session` lines; raises
    :class:`RecipeError` / :class:`SessionError` on the first fault.
    """
    session = load_any(path)
    return session, describe_session(session)


# -- starter recipe ------------------------------------------------------------
def _rel(path: Path, base: Path | None) -> str:
    if base is None:
        return str(path)
    try:
        return os.path.relpath(path, base)
    except ValueError:  # other drive on Windows
        return str(path)



def _cube_tracer(cube) -> str | None:
    """The tracer of the built-in line whose rest value the cube's header gives.

    Matches RESTFRQ/RESTWAV against :func:`gyrometer.core.lines.list_lines`
    to 1e-4 (relative); ``None`` when the header has no rest value or no
    line matches.
    """
    import astropy.units as u

    from .lines import list_lines

    axis = cube.spectral
    if not axis.rest_value or not axis.rest_unit:
        return None
    try:
        rest_hz = (axis.rest_value * u.Unit(axis.rest_unit)).to_value(
            u.Hz, equivalencies=u.spectral())
    except (ValueError, TypeError):
        return None
    for line in list_lines():
        if line.frequency_hz and abs(rest_hz / line.frequency_hz - 1.0) < 1e-4:
            return line.tracer
    return None

def _estimates(data_path: Path) -> dict[str, dict[str, object]]:
    """Cheap values from the data: route, name, tracer, centre, slits.

    The centre is the flux-weighted centroid of the intensity map
    (:func:`gyrometer.core.geometry_estimate.intensity_centroid`) or the
    map centre for a cube.
    """
    from .coords import pixel_scale_arcsec
    from .dataset import Cube
    from .fitsio import open_data

    data = open_data(data_path)
    est: dict[str, dict[str, object]] = {"galaxy": {}, "input": {},
                                         "geometry": {}, "slits": {}}
    est["galaxy"]["name"] = data.name
    if isinstance(data, Cube):
        est["input"]["kind"] = "cube"
        est["input"]["cube"] = str(data_path)
        tracer = _cube_tracer(data)
        if tracer:
            est["galaxy"]["tracer"] = tracer
        shape = data.spatial_shape
        image = None
    else:
        est["input"]["kind"] = "maps"
        est["input"]["maps"] = str(data_path)
        est["galaxy"]["tracer"] = data.tracer
        shape = data.shape
        image = np.asarray(data.intensity, dtype=float)
        v = np.asarray(data.velocity_kms, dtype=float)
        if np.isfinite(v).any():
            est["geometry"]["vsys_kms"] = round(float(np.nanmedian(v)), 1)
    wcs = data.wcs
    ny, nx = shape
    ra = dec = None
    if image is not None and np.isfinite(image).any():
        from .geometry_estimate import intensity_centroid
        try:
            centre = intensity_centroid(data)
            ra, dec = centre.ra_deg, centre.dec_deg
        except GyrometerError:
            pass
    if ra is None:
        world = wcs.celestial.pixel_to_world((nx - 1) / 2.0,
                                             (ny - 1) / 2.0).icrs
        ra, dec = float(world.ra.deg), float(world.dec.deg)
    est["geometry"]["ra_deg"] = round(float(ra), 6)
    est["geometry"]["dec_deg"] = round(float(dec), 6)
    scale = pixel_scale_arcsec(wcs)
    psf = data.psf_fwhm_arcsec or 2.0 * scale
    spacing = max(psf, 2.0 * scale)
    half_field = 0.5 * min(nx, ny) * scale
    count = int(max(3, min(15, 2 * math.floor(0.6 * half_field / spacing) + 1)))
    est["slits"].update(count=count, spacing_arcsec=round(spacing, 3),
                        width_arcsec=round(spacing, 3),
                        half_length_arcsec=round(0.9 * half_field, 2))
    return est


def starter_recipe(data_path: str | os.PathLike, *,
                   recipe_dir: str | os.PathLike | None = None) -> str:
    """Text of a recipe for ``data_path`` with every setting commented.

    Values that can be read or guessed cheaply from the data are filled in
    (route, galaxy name, tracer, centre at the intensity centroid, systemic
    velocity as the median velocity, slit spacing from the PSF); the
    geometry is set to ``mode = "estimate"``. Settings without a value
    (e.g. the distance) appear commented out.

    Parameters
    ----------
    data_path : path-like
        A FITS cube or map set.
    recipe_dir : path-like, optional
        Folder the recipe will be saved in; paths are written relative to
        it (absolute otherwise).
    """
    data_path = Path(data_path).resolve()
    base = None if recipe_dir is None else Path(recipe_dir).resolve()
    est = _estimates(data_path)
    lines = [
        "# Gyrometer recipe: one measurement of a bar pattern speed",
        "# (Tremaine & Weinberg 1984). Run it with:  gyrometer measure THIS_FILE",
        "# Check it without running:                gyrometer check THIS_FILE",
        "# Paths are relative to this file's folder. Lines starting with '#'",
        "# are comments; remove the '#' of an optional setting to use it.",
        f"# Written for: {data_path.name}",
        "",
    ]
    for section, specs in SCHEMA.items():
        lines.append(f"[{section}]")
        for spec in specs:
            value = est.get(section, {}).get(spec.name, spec.default)
            if spec.kind == "path" and value and spec.name != "folder":
                value = _rel(Path(str(value)), base)
            lines.append(f"# {spec.doc}")
            if spec.choices and spec.kind != "list":
                lines.append(f"#   choices: {', '.join(map(str, spec.choices))}")
            lines.append(_starter_line(spec, value, section))
        lines.append("")
    return "\n".join(lines)


def _starter_line(spec: KeySpec, value, section: str) -> str:
    if section == "geometry" and spec.name == "mode":
        return 'mode = "estimate"'
    if value is None:
        if spec.kind == "str?":
            return f'{spec.name} = ""'
        if spec.kind == "float|estimate":
            return f'{spec.name} = "estimate"'
        if spec.kind == "floats?":
            return f"# {spec.name} = [6562.80, 6583.45]    (optional)"
        example = {"distance_mpc": 20.0, "rest_value": 6562.8,
                   "inc_deg": 45.0, "pa_deg": 0.0}.get(spec.name, 0.0)
        return f"# {spec.name} = {_toml_value(example)}    (optional)"
    if isinstance(value, tuple):
        value = list(value)
    return f"{spec.name} = {_toml_value(value)}"

