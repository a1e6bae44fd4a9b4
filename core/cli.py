"""The ``gyrometer`` command: the whole measurement from one recipe file.

Subcommands (run ``gyrometer COMMAND --help`` for each):

``demo``      measure the bundled sample galaxy and print the result
``starter``   write a recipe for a data file, every setting commented
``check``     validate recipes without running them
``measure``   run one or many recipes (or saved sessions)
``moments``   make moment maps (intensity, velocity, dispersion) of a cube
``merge``     combine results files into one paper table
``regions``   export slits to / import slits from DS9 or CASA region files

Exit codes: see :data:`EXIT_CODES`. Every error Gyrometer raises on purpose
(:class:`~gyrometer.core.errors.GyrometerError`) is caught in one place,
:func:`main`, and printed as ``gyrometer: error: <message>``.
"""

from __future__ import annotations

import argparse
import os
import sys
import threading
import time
from pathlib import Path
from typing import Sequence, TextIO

from .errors import Cancelled, GyrometerError, OutputError

__all__ = ["main", "build_parser", "EXIT_CODES", "ProgressBar",
           "find_samples", "format_summary"]

#: Exit status of the command line.
EXIT_CODES = {
    0: "success",
    1: "a problem with the data, the recipe or the measurement "
       "(the message names the file and the fault)",
    2: "wrong usage of the command (unknown option, missing argument)",
    3: "cancelled or interrupted (Ctrl-C); no output was written",
    4: "an output could not be written (it exists and --force was not "
       "given, or the folder is not writable)",
    5: "internal error (a bug: please report it with the output of -v)",
}

_EPILOG = """exit codes:
  0  success
  1  a problem with the data, the recipe or the measurement
  2  wrong usage of the command
  3  cancelled or interrupted (Ctrl-C); nothing was written
  4  an output exists (use --force) or cannot be written
  5  internal error (please report it, with the output of -v)
"""

_DESCRIPTION = """\
Gyrometer measures the pattern speed of a bar (Omega_p) with the
Tremaine-Weinberg method from integral-field or radio data, with a Monte
Carlo uncertainty budget, the corotation and Lindblad resonance radii and
the bar rotation rate R = R_CR / R_bar, and writes paper-ready tables and
figures.

Typical use:
  gyrometer demo                          measure the bundled sample galaxy
  gyrometer starter cube.fits -o g.toml   write a recipe, then edit it
  gyrometer check g.toml                  validate it without running
  gyrometer measure g.toml                run it (tables, figures, session)
  gyrometer measure *.toml --table paper.tex   a whole sample, one table
  gyrometer sample survey.toml            a whole sample in parallel (resumable;
                                          --scheduler tcp://HOST:8786 for Dask)
"""


# -- progress -------------------------------------------------------------------
class ProgressBar:
    """A text progress bar on a stream (stderr), no extra dependency.

    On a terminal the bar is redrawn in place; otherwise one line per stage
    is printed, so logs stay readable.
    """

    def __init__(self, stream: TextIO | None = None, width: int = 28,
                 enabled: bool = True) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.width = width
        self.enabled = enabled
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._last_stage = ""
        self._last_draw = 0.0
        self._shown = False

    def __call__(self, done: int, total: int, stage: str) -> None:
        if not self.enabled:
            return
        if not self.tty:
            top = stage.split(":")[0]
            if top != self._last_stage and top != "done":
                self.stream.write(f"gyrometer: {top}...\n")
                self.stream.flush()
                self._last_stage = top
            return
        now = time.monotonic()
        if stage == self._last_stage and now - self._last_draw < 0.1 \
                and done < total:
            return
        self._last_stage, self._last_draw = stage, now
        frac = 0.0 if total <= 0 else min(1.0, max(0.0, done / total))
        filled = int(round(frac * self.width))
        text = (f"\r[{'#' * filled}{'.' * (self.width - filled)}] "
                f"{100 * frac:3.0f}%  {stage[:48]:<48}")
        self.stream.write(text)
        self.stream.flush()
        self._shown = True

    def close(self) -> None:
        if self._shown and self.tty:
            self.stream.write("\r" + " " * (self.width + 58) + "\r")
            self.stream.flush()
        self._shown = False


# -- text output ------------------------------------------------------------------
def _pm(value: float, plus: float, minus: float | None = None,
        unit: str = "") -> str:
    """Plain-text value with PDG-rounded errors: ``41 +5/-4 unit``."""
    import math

    from .tables import round_to_uncertainty

    if not math.isfinite(value):
        return "n/a"
    minus = plus if minus is None else minus
    if not (math.isfinite(plus) and math.isfinite(minus) and plus > 0
            and minus > 0):
        text = f"{value:.3g}"
    else:
        v, a, b = round_to_uncertainty(value, plus, minus)
        text = f"{v} ± {a}" if a == b else f"{v} +{a}/-{b}"
    return f"{text} {unit}".rstrip()


def format_summary(result, paths: dict | None = None,
                   verbose: bool = False) -> str:
    """The plain-text report of one run (what ``measure`` and ``demo`` print)."""
    import math

    row = result.row
    g = result.session.geometry
    lines = [f"{row.galaxy}: tracer {row.tracer}, {row.route} route, "
             f"{row.n_slits} slits in the fit",
             f"  geometry        PA = {g.pa_deg:.1f} deg, i = {g.inc_deg:.1f} "
             f"deg, Vsys = {g.vsys_kms:.1f} km/s, D = "
             + ("n/a" if g.distance_mpc is None else f"{g.distance_mpc:g} Mpc")]
    om = row.omega_p_arcsec
    om_kpc = row.omega_p_kpc
    text = "  pattern speed   Omega_p = "
    if not om_kpc.is_missing:
        text += _pm(om_kpc.value, om_kpc.plus, om_kpc.minus, "km/s/kpc") + "  = "
    text += _pm(om.value, om.plus, om.minus, "km/s/arcsec")
    lines.append(text)
    lines.append(f"                  (median and 16th-84th percentiles of the "
                 f"Monte Carlo budget; fit alone: "
                 f"{_pm(row.omega_p_fit_arcsec, row.omega_p_fit_err_arcsec, None, 'km/s/arcsec')})")
    if not row.r_cr_arcsec.is_missing:
        cr = row.r_cr_arcsec
        text = f"  corotation      R_CR = {_pm(cr.value, cr.plus, cr.minus, 'arcsec')}"
        if not row.r_cr_kpc.is_missing:
            k = row.r_cr_kpc
            text += f"  = {_pm(k.value, k.plus, k.minus, 'kpc')}"
        lines.append(text)
    if result.resonances is not None:
        parts = []
        scale = None
        if g.distance_mpc is not None:
            from .geometry import kpc_per_arcsec
            scale = kpc_per_arcsec(g.distance_mpc)
        for r in result.resonances.rows:
            if r.name == "CR":
                continue
            # Quote a radius only where the nominal solution found one; a
            # median over the few draws that happen to cross is misleading.
            if r.status == "found" and math.isfinite(r.median_arcsec):
                val = (f"{r.median_arcsec * scale:.2f} kpc" if scale
                       else f"{r.median_arcsec:.1f} arcsec")
                if r.fraction_found < 0.95:
                    val += f" (in {100 * r.fraction_found:.0f}% of draws)"
            else:
                val = r.status
                if r.fraction_found >= 0.005:
                    val += f" (crosses in {100 * r.fraction_found:.0f}% of draws)"
            parts.append(f"{r.name} {val}")
        lines.append("  resonances      " + "\n                  ".join(parts))
    if not row.r_bar_arcsec.is_missing:
        b = row.r_bar_arcsec
        text = (f"  bar             R_bar = {_pm(b.value, b.plus, b.minus, 'arcsec')}"
                " (deprojected)")
        lines.append(text)
    if not row.rate.is_missing:
        R = row.rate
        lines.append(f"  rotation rate   R = R_CR/R_bar = {_pm(R.value, R.plus, R.minus)}"
                     f"  -> {row.rate_class} (ultrafast < 1.0 <= fast <= 1.4 < slow)")
    elif result.bar.note:
        lines.append(f"  rotation rate   not computed: {result.bar.note}")
    if result.budget is not None:
        lines.append("  uncertainty budget of Omega_p (km/s/arcsec):")
        lines.append(f"    {'source':<16}{'draws':>6}{'median':>10}{'16%':>10}"
                     f"{'84%':>10}{'sigma':>9}{'share':>7}")
        for t in result.budget.terms:
            share = "" if t.name == "all combined" else f"{100 * t.share:5.0f}%"
            lines.append(f"    {t.name:<16}{t.n_draws:>6}{t.median:>10.4f}"
                         f"{t.p16:>10.4f}{t.p84:>10.4f}{t.sigma:>9.4f}{share:>7}")
    if result.absorption is not None:
        fits = result.absorption.slit_fits
        ok = sum(1 for f in fits if not f.message)
        lines.append(f"  slit spectra    {ok} of {len(fits)} fitted; template: "
                     f"{result.absorption.template.origin}")
    if result.radial is not None:
        lines.extend(_radial_lines(result.radial))
    if result.warnings:
        shown = result.warnings if verbose else result.warnings[:6]
        lines.append("  notes:")
        lines.extend(f"    - {w}" for w in shown)
        if len(shown) < len(result.warnings):
            lines.append(f"    ... {len(result.warnings) - len(shown)} more "
                         "(-v shows all)")
    if paths:
        folder = Path(next(iter(paths.values()))).parent
        lines.append(f"  outputs ({len(paths)} files) in {folder}/:")
        names = [Path(p).name for p in paths.values()]
        for i in range(0, len(names), 4):
            lines.append("    " + "  ".join(names[i:i + 4]))
    return "\n".join(lines)


def _radial_lines(radial) -> list[str]:
    """Per-annulus lines of Omega_p(R) for the summary."""
    kpc = radial.omega_kms_kpc is not None
    unit = "km/s/kpc" if kpc else "km/s/arcsec"
    edges = radial.edges_kpc if kpc else radial.edges_arcsec
    om = radial.omega_kms_kpc if kpc else radial.omega_kms_arcsec
    err = radial.omega_err_kms_kpc if kpc else radial.omega_err_kms_arcsec
    r_unit = "kpc" if kpc else "arcsec"
    lines = [f"  Omega_p(R)      {radial.n_annuli} annuli, "
             f"{radial.regularisation}, lam = {radial.lam:.3g} "
             f"({radial.lam_method}); errors: {radial.error_method}",
             f"    {'R (' + r_unit + ')':<18}{'Omega_p (' + unit + ')':<28}"
             "resolution"]
    for j in range(radial.n_annuli):
        weak = "" if radial.constrained[j] else "  (set by the smoothing)"
        lines.append(f"    {edges[j]:7.2f} - {edges[j + 1]:<7.2f}  "
                     f"{_pm(float(om[j]), float(err[j])):<28}"
                     f"{radial.resolution[j]:.2f}{weak}")
    return lines


# -- helpers ------------------------------------------------------------------------
def find_samples(given: str | None = None) -> Path:
    """The folder of the bundled sample galaxies.

    ``given`` (``--samples``) wins; else ``$GYROMETER_SAMPLES``; else
    ``sample_cubes/`` next to the package (a source checkout or editable
    install).
    """
    candidates = []
    if given:
        candidates.append(Path(given))
    if os.environ.get("GYROMETER_SAMPLES"):
        candidates.append(Path(os.environ["GYROMETER_SAMPLES"]))
    here = Path(__file__).resolve()
    candidates += [parent / "sample_cubes" for parent in here.parents[:3]]
    for folder in candidates:
        if folder.is_dir():
            return folder
    raise GyrometerError("the sample galaxies were not found",
                         path=str(candidates[0]) if given else None,
                         hint="pass --samples FOLDER (the sample_cubes folder "
                              "of a Gyrometer checkout)")


def _apply_overrides(session, args):
    from dataclasses import replace

    budget = session.budget
    if getattr(args, "draws", None):
        budget = replace(budget, n_draws=int(args.draws))
    if getattr(args, "seed", None) is not None:
        budget = replace(budget, seed=int(args.seed))
    output = session.output
    if getattr(args, "output_dir", None):
        output = replace(output, folder=str(Path(args.output_dir).resolve()))
    if getattr(args, "no_figures", False):
        output = replace(output, figures=())
    return session.with_(budget=budget, output=output)


def _say(args, text: str) -> None:
    if not args.quiet:
        print(text, flush=True)


def _run_one(path: Path, args, bar: ProgressBar, cancel):
    from .pipeline import export_result, run_session
    from .recipe import load_any

    session = _apply_overrides(load_any(path), args)
    try:
        result = run_session(session, progress=bar, cancel=cancel)
        paths = export_result(result, overwrite=args.force, progress=bar,
                              cancel=cancel)
    finally:
        bar.close()
    return result, paths


# -- subcommands -------------------------------------------------------------------
def _cmd_measure(args, bar, cancel) -> int:
    from .tables import merge_results

    status = 0
    ecsv_files = []
    for recipe in args.recipes:
        try:
            result, paths = _run_one(Path(recipe), args, bar, cancel)
        except Cancelled:
            raise
        except GyrometerError as exc:
            if not args.keep_going or len(args.recipes) == 1:
                raise
            print(f"gyrometer: error: {exc}", file=sys.stderr)
            status = max(status, _code_of(exc))
            continue
        _say(args, format_summary(result, paths, args.verbose))
        if "table.ecsv" in paths:
            ecsv_files.append(paths["table.ecsv"])
    if args.table:
        if not ecsv_files:
            raise GyrometerError("no results to combine into --table "
                                 "(add 'ecsv' to [output] tables)")
        table = merge_results(ecsv_files)
        _write_table(table, Path(args.table), args.style, args.force)
        _say(args, f"paper table of {len(table)} galaxies: {args.table}")
    return status


def _write_table(table, path: Path, style: str, force: bool) -> None:
    from .tables import write_csv, write_ecsv, write_json, write_latex

    suffix = path.suffix.lower()
    if suffix == ".tex":
        write_latex(table, path, style=style, overwrite=force)
    elif suffix == ".ecsv":
        write_ecsv(table, path, overwrite=force)
    elif suffix == ".csv":
        write_csv(table, path, overwrite=force)
    elif suffix == ".json":
        write_json(table, path, overwrite=force)
    else:
        raise OutputError("unknown table format (use .tex, .ecsv, .csv or "
                          ".json)", path=str(path))


def _cmd_merge(args, bar, cancel) -> int:
    from .tables import merge_results

    table = merge_results(args.results)
    _write_table(table, Path(args.output), args.style, args.force)
    _say(args, f"{len(table)} galaxies written to {args.output}")
    return 0


def _cmd_check(args, bar, cancel) -> int:
    from .recipe import check_recipe

    for recipe in args.recipes:
        _, lines = check_recipe(recipe)
        _say(args, f"{recipe}: OK")
        for line in lines:
            _say(args, f"  {line}")
    return 0


def _cmd_starter(args, bar, cancel) -> int:
    from .recipe import starter_recipe
    from .safeio import write_text_atomic

    target = Path(args.output) if args.output else None
    text = starter_recipe(args.data, recipe_dir=(target.parent if target
                                                 else Path.cwd()))
    if target is None:
        sys.stdout.write(text)
    else:
        write_text_atomic(target, text, overwrite=args.force)
        _say(args, f"recipe written to {target}; edit it, then run: "
                   f"gyrometer check {target}")
    return 0


def _cmd_moments(args, bar, cancel) -> int:
    from .fitsio import load_cube, write_mapset
    from .moments import MomentSettings, compute_moments

    settings = MomentSettings(line=args.line, vsys_kms=args.vsys,
                              window_halfwidth_kms=args.window,
                              snr_threshold=args.snr,
                              mask="none" if args.no_mask else "smooth",
                              tracer=args.tracer)
    cube = load_cube(args.cube, progress=bar, cancel=cancel)
    try:
        maps = compute_moments(cube, settings, progress=bar, cancel=cancel)
    finally:
        bar.close()
    out = Path(args.output) if args.output else \
        Path(args.cube).with_name(Path(args.cube).stem + "_maps.fits")
    write_mapset(out, maps, overwrite=args.force)
    _say(args, f"moment maps of {maps.name or Path(args.cube).name} "
               f"({maps.shape[1]} x {maps.shape[0]} pixels) written to {out}")
    return 0


def _cmd_regions(args, bar, cancel) -> int:
    from .recipe import load_any
    from .regionfiles import read_slit_regions, write_slit_regions
    from .session import save_session

    session = load_any(args.session)
    if args.action == "export":
        if session.slits is None or session.geometry is None:
            from .pipeline import load_inputs, maps_for, resolve_geometry, resolve_slits
            data, _ = load_inputs(session.input, tracer=session.tracer)
            vsys = None if session.geometry is None else session.geometry.vsys_kms
            maps = maps_for(data, session, vsys, progress=bar, cancel=cancel)
            bar.close()
            geometry = resolve_geometry(session, maps)
            slits = resolve_slits(session, maps, geometry)
        else:
            geometry, slits = session.geometry, session.slits
        write_slit_regions(args.output, slits, geometry, overwrite=args.force)
        _say(args, f"{len(slits)} slits written to {args.output}")
        return 0
    if session.geometry is None:
        raise GyrometerError("importing slits needs a given geometry "
                             "([geometry] mode = 'given' or a saved session)",
                             path=args.session, keyword="geometry.mode")
    slits = read_slit_regions(args.regions, session.geometry,
                              symmetric=session.symmetric)
    save_session(session.with_(slits=slits), args.output, overwrite=args.force)
    _say(args, f"{len(slits)} slits from {args.regions} put into the session "
               f"{args.output}")
    return 0


def _recipe_as_session(recipe: Path) -> Path:
    """The recipe as a session file in a fresh temporary folder (the app
    opens session files; the recipe itself is left untouched)."""
    import tempfile

    from .recipe import load_recipe
    from .session import save_session

    folder = Path(tempfile.mkdtemp(prefix="gyrometer-demo-"))
    return save_session(load_recipe(recipe), folder / recipe.name)


def _display_available() -> bool:
    return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))


def _cmd_demo(args, bar, cancel) -> int:
    samples = find_samples(args.samples)
    recipe = samples / f"{args.galaxy}.recipe.toml"
    if not recipe.is_file():
        raise GyrometerError("no recipe for the sample galaxy", path=str(recipe),
                             hint="see sample_cubes/ for the available "
                                  "galaxies (--galaxy NAME)")
    if not args.headless:
        if _display_available():
            try:
                from gyrometer.app.main import main as app_main  # lazy: no Qt in core
            except ImportError as exc:
                _say(args, f"the desktop app cannot start ({exc}): running "
                           "the same measurement headless")
            else:
                return int(app_main([str(_recipe_as_session(recipe))]) or 0)
        else:
            _say(args, "no display found: running the same measurement "
                       "headless")
    if not args.output_dir:
        args.output_dir = "gyrometer-demo-output"
    _say(args, f"measuring the sample galaxy {args.galaxy} from {recipe}")
    result, paths = _run_one(recipe, args, bar, cancel)
    _say(args, format_summary(result, paths, args.verbose))
    truth = samples / f"{args.galaxy}_truth.json"
    if truth.is_file():
        import json
        try:
            doc = json.loads(truth.read_text())
            om = doc.get("truth", doc).get("omega_p_kms_kpc")
            om = om[0] if isinstance(om, list) else om
            if om is not None:
                _say(args, f"  (the sample is synthetic; its true pattern "
                           f"speed is {float(om):g} km/s/kpc)")
        except (ValueError, OSError, TypeError):
            pass
    return 0


# -- parser ----------------------------------------------------------------------
def _common(p: argparse.ArgumentParser) -> None:
    g = p.add_mutually_exclusive_group()
    g.add_argument("-q", "--quiet", action="store_true",
                   help="print nothing but errors")
    g.add_argument("-v", "--verbose", action="store_true",
                   help="print every note and, on an internal error, the "
                        "traceback")


def _run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("-o", "--output-dir", metavar="FOLDER",
                   help="write the outputs here instead of the recipe's "
                        "[output] folder")
    p.add_argument("--force", action="store_true",
                   help="replace existing output files")
    p.add_argument("--draws", type=int, metavar="N",
                   help="Monte Carlo draws per error source (overrides the "
                        "recipe; at least 10)")
    p.add_argument("--seed", type=int, metavar="N",
                   help="random seed (overrides the recipe)")
    p.add_argument("--no-figures", action="store_true",
                   help="skip the figures (faster)")


def _wrap(text: str) -> str:
    import textwrap
    return textwrap.fill(text, 78)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``gyrometer`` command."""
    from . import __version__

    fmt = argparse.RawDescriptionHelpFormatter
    parser = argparse.ArgumentParser(
        prog="gyrometer", description=_DESCRIPTION, epilog=_EPILOG,
        formatter_class=fmt)
    parser.add_argument("--version", action="version",
                        version=f"gyrometer {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser(
        "demo", formatter_class=fmt, epilog=_EPILOG,
        help="measure the bundled sample galaxy",
        description=_wrap("Measure the bundled synthetic sample galaxy and print "
                    "Omega_p, the resonance radii, R and the uncertainty "
                    "budget. With a display, opens the desktop app with the "
                    "sample loaded instead (unless --headless)."))
    p.add_argument("--headless", action="store_true",
                   help="never open the desktop app")
    p.add_argument("--galaxy", default="LBDP-011",
                   help="sample galaxy to measure (default: %(default)s)")
    p.add_argument("--samples", metavar="FOLDER",
                   help="folder of the sample galaxies (default: "
                        "sample_cubes/ of this checkout)")
    _run_options(p)
    p.set_defaults(func=_cmd_demo)
    _common(p)

    p = sub.add_parser(
        "starter", formatter_class=fmt, epilog=_EPILOG,
        help="write a recipe for a data file",
        description=_wrap("Write a recipe (TOML) for a FITS cube or map set with "
                    "every setting present and commented; values that can "
                    "be read from the data (name, centre, PSF, slit spacing) "
                    "are filled in. Edit it, then run 'gyrometer check'."))
    p.add_argument("data", help="FITS cube or map set")
    p.add_argument("-o", "--output", metavar="RECIPE",
                   help="recipe file to write (default: print it)")
    p.add_argument("--force", action="store_true",
                   help="replace an existing recipe file")
    p.set_defaults(func=_cmd_starter)
    _common(p)

    p = sub.add_parser(
        "check", formatter_class=fmt, epilog=_EPILOG,
        help="validate recipes without running them",
        description=_wrap("Check recipes (or saved sessions): types, unknown keys, "
                    "missing files. Each fault is reported with its key, "
                    "e.g. 'geometry.pa_deg'."))
    p.add_argument("recipes", nargs="+", metavar="RECIPE",
                   help="recipe (.toml) or saved session file")
    p.set_defaults(func=_cmd_check)
    _common(p)

    p = sub.add_parser(
        "measure", formatter_class=fmt, epilog=_EPILOG,
        help="run recipes or sessions: tables, figures, session file",
        description=_wrap("Run the whole measurement of each recipe (or saved "
                    "session): geometry, slits, Omega_p, the uncertainty "
                    "budget, diagnostics, rotation curve, resonances and R. "
                    "Writes the results tables (ECSV, CSV, JSON, LaTeX), "
                    "figures, the slit region file and a session file that "
                    "reproduces the result. Several recipes make a whole "
                    "sample; --table collects them into one paper table."))
    p.add_argument("recipes", nargs="+", metavar="RECIPE",
                   help="recipe (.toml) or saved session file")
    _run_options(p)
    p.add_argument("--keep-going", action="store_true",
                   help="with several recipes, go on after a failed one")
    p.add_argument("--table", metavar="FILE",
                   help="also write one table of all galaxies (.tex, .ecsv, "
                        ".csv or .json)")
    p.add_argument("--style", choices=("aastex", "tabular"), default="aastex",
                   help="LaTeX style of --table (default: %(default)s)")
    p.set_defaults(func=_cmd_measure)
    _common(p)

    p = sub.add_parser(
        "moments", formatter_class=fmt, epilog=_EPILOG,
        help="make moment maps of a cube",
        description=_wrap("Moment 0, 1 and 2 maps with errors of a spectral cube, "
                    "written as one multi-extension FITS map set."))
    p.add_argument("cube", help="FITS spectral cube")
    p.add_argument("-o", "--output", metavar="MAPS",
                   help="map set to write (default: CUBE_maps.fits)")
    p.add_argument("--line", help="line name for the rest value (e.g. "
                                  "Halpha, HI, 'CO(1-0)')")
    p.add_argument("--vsys", type=float, metavar="KMS",
                   help="centre of the velocity window, km/s")
    p.add_argument("--window", type=float, default=500.0, metavar="KMS",
                   help="half-width of the velocity window, km/s "
                        "(default: %(default)s)")
    p.add_argument("--snr", type=float, default=4.0,
                   help="mask clip level in noise units (default: %(default)s)")
    p.add_argument("--no-mask", action="store_true",
                   help="use every channel in the window")
    p.add_argument("--tracer", help="tracer label of the maps")
    p.add_argument("--force", action="store_true",
                   help="replace an existing output file")
    p.set_defaults(func=_cmd_moments)
    _common(p)

    p = sub.add_parser(
        "merge", formatter_class=fmt, epilog=_EPILOG,
        help="combine results files into one paper table",
        description=_wrap("Combine results files (.ecsv, .json or .csv written by "
                    "'gyrometer measure') into one table, one row per "
                    "galaxy. The output format follows the suffix: .tex "
                    "(AASTeX deluxetable or tabular), .ecsv, .csv, .json."))
    p.add_argument("results", nargs="+", metavar="RESULTS")
    p.add_argument("-o", "--output", required=True, metavar="TABLE")
    p.add_argument("--style", choices=("aastex", "tabular"), default="aastex",
                   help="LaTeX style (default: %(default)s)")
    p.add_argument("--force", action="store_true",
                   help="replace an existing table")
    p.set_defaults(func=_cmd_merge)
    _common(p)

    p = sub.add_parser(
        "regions", formatter_class=fmt, epilog=_EPILOG,
        help="export or import slits as sky region files",
        description=_wrap("Slits as sky polygons (DS9 .reg or CASA .crtf). "
                    "'export' writes the slits of a recipe or session; "
                    "'import' reads polygons back as slits (they must be "
                    "rectangles parallel to the line of nodes) and writes a "
                    "session that uses them."))
    rsub = p.add_subparsers(dest="action", metavar="ACTION")
    rsub.required = True
    q = rsub.add_parser("export", help="slits of a recipe/session to a file",
                        formatter_class=fmt, epilog=_EPILOG)
    q.add_argument("session", metavar="RECIPE")
    q.add_argument("-o", "--output", required=True, metavar="REGIONS",
                   help=".reg (DS9) or .crtf (CASA)")
    q.add_argument("--force", action="store_true")
    q.set_defaults(func=_cmd_regions)
    _common(q)
    q = rsub.add_parser("import", help="slits from a region file into a session",
                        formatter_class=fmt, epilog=_EPILOG)
    q.add_argument("regions", metavar="REGIONS")
    q.add_argument("--into", dest="session", required=True, metavar="RECIPE",
                   help="recipe or session with the geometry")
    q.add_argument("-o", "--output", required=True, metavar="SESSION",
                   help="session file to write")
    q.add_argument("--force", action="store_true")
    q.set_defaults(func=_cmd_regions)
    _common(q)

    from .survey import add_sample_subcommand
    add_sample_subcommand(sub)
    return parser


def _code_of(exc: BaseException) -> int:
    if isinstance(exc, Cancelled):
        return 3
    if isinstance(exc, OutputError):
        return 4
    return 1


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``gyrometer`` console script; returns the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, usage errors
        return int(exc.code or 0)
    bar = ProgressBar(enabled=not args.quiet)
    cancel = threading.Event()
    try:
        return int(args.func(args, bar, cancel) or 0)
    except KeyboardInterrupt:
        bar.close()
        print("\ngyrometer: interrupted; no output was written",
              file=sys.stderr)
        return 3
    except GyrometerError as exc:  # the one place user faults are reported
        bar.close()
        print(f"gyrometer: error: {exc}", file=sys.stderr)
        return _code_of(exc)
    except Exception as exc:  # a bug: say so plainly
        bar.close()
        if args.verbose:
            import traceback
            traceback.print_exc()
        print(f"gyrometer: internal error: {type(exc).__name__}: {exc} "
              "(please report it; -v shows the traceback)", file=sys.stderr)
        return 5


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
