"""Sample runs: many galaxies in parallel, one merged table.

A *sample file* (TOML, Gyrometer's own layout) lists the galaxies of a
survey and the settings they share::

    [sample]
    name = "LBDP pilot"            # optional; default: the file's stem
    recipes = ["recipes/*.toml"]   # recipe or session files (globs allowed)
    # folder = "recipes"           #   ...or every *.toml in a folder
    # table = "inputs.ecsv"        #   ...or one row per galaxy (ECSV / CSV)
    output = "pilot-run"           # run folder (default: <stem>-run)
    latex_style = "aastex"         # style of the merged LaTeX table

    [engine]
    kind = "local"                 # "local" (process pool), "dask", "serial"
    workers = 0                    # local: 0 = every core
    scheduler = ""                 # dask: e.g. "tcp://127.0.0.1:8786"
    memory_fraction = 0.8          # local: share of the available memory

    [defaults.uncertainty]         # any recipe section: settings shared by
    draws = 300                    # every galaxy (a recipe's own values win)
    [defaults.output]
    figures = []

Relative paths are relative to the file that names them (the sample file,
a recipe, or the inputs table). An inputs table has one row per galaxy;
its columns are recipe keys, dotted (``geometry.pa_deg``) or bare when the
name belongs to one section only (``maps``, ``inc_deg``, ``distance_mpc``;
``name`` or ``galaxy`` for the galaxy name). Empty cells take the defaults.

:func:`run_sample` runs every galaxy through the same top-level function,
:func:`run_galaxy`, which calls :func:`gyrometer.core.pipeline.run_session`
and :func:`gyrometer.core.pipeline.export_result`, on one of three engines:

* ``"local"``: a :class:`concurrent.futures.ProcessPoolExecutor` (forkserver
  or spawn start) with one worker per usable core, memory-aware (see
  :func:`estimate_memory_bytes`);
* ``"dask"``: an existing ``dask.distributed`` cluster, reached by its
  scheduler address; Dask places the work and governs worker memory;
* ``"serial"``: in this process, one galaxy after the other (the reference
  the others are tested against, and the easiest to debug).

The run folder holds ``manifest.json`` (what finished, with a checksum of
the inputs and settings), ``galaxies/<name>/`` (each galaxy's own tables,
figures, region and session files), ``results.ecsv`` and ``results.tex``
(the merged paper table) and ``failures.ecsv``. A run that is stopped or
crashes continues where it stopped when started again: a galaxy is skipped
when the manifest records it as finished under the same checksum and its
results file still exists; failed galaxies are tried again.

Notes
-----
* The checksum (:func:`galaxy_key`) covers the SHA-256 of every input file
  and every setting; file digests are cached in the manifest by path, size
  and modification time, so a restart does not read gigabytes again.
* Each galaxy's Monte Carlo budget runs in its worker with
  ``uncertainty.workers = 1``: the sample is parallel across galaxies, not
  within one. The run folder belongs to the run: a galaxy that runs again
  replaces its own earlier outputs; a new run refuses a non-empty folder
  that holds no manifest unless ``overwrite`` (``--force``) is given.
* Worker processes should run their math libraries single-threaded
  (``OMP_NUM_THREADS=1``, ``OPENBLAS_NUM_THREADS=1``): with one worker per
  core, multi-threaded BLAS oversubscribes the cores. The ``sample``
  command sets these for the local engine unless they are set already; a
  script calling :func:`run_sample` should set them before numpy is
  imported. Dask's nanny sets them for its workers by default.
* Dask: the client (this process) and the workers must see the recipes,
  the data and the run folder at the same paths (a shared file system).
  Dask's own worker memory limits apply; stopping a run cancels queued
  galaxies and asks running ones to stop through a file in the run folder.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import hashlib
import json
import math
import os
import re
import socket
import sys
import time
import warnings
from collections import deque
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Sequence

from .errors import Cancelled, GyrometerError, OutputError, RecipeError
from .progress import CancelFlag, ProgressCallback, report
from .session import (SCHEMA, SESSION_SCHEMA, Session, _suggest, migrate,
                      read_toml, session_from_dict, session_to_toml,
                      sha256_file)

__all__ = [
    "ENGINES",
    "MANIFEST_SCHEMA",
    "MANIFEST_SCHEMA_VERSION",
    "EngineSettings",
    "GalaxyEntry",
    "SampleSpec",
    "GalaxyTask",
    "GalaxyOutcome",
    "SampleStatus",
    "SampleRun",
    "load_sample",
    "galaxy_key",
    "estimate_memory_bytes",
    "available_memory_bytes",
    "run_galaxy",
    "run_sample",
    "add_sample_subcommand",
    "run_sample_command",
]

#: Engines :func:`run_sample` understands.
ENGINES = ("local", "dask", "serial")
#: Name and version of the run folder's ``manifest.json`` layout.
MANIFEST_SCHEMA = "gyrometer-sample-run"
MANIFEST_SCHEMA_VERSION = 1

#: Memory rule of the local engine (see :func:`estimate_memory_bytes`).
#: A worker process that has run one small galaxy holds about 130 MiB
#: (measured here with ``resource.getrusage``; figures add some more).
BASE_MEMORY_BYTES = 256 * 2**20
#: A cube is memory-mapped and streamed through the moment maps and the
#: cube-route integrals, so all of its pages may become resident; 25 % on
#: top covers the maps, masks and 32 MiB blocks derived from it.
CUBE_MEMORY_FACTOR = 1.25
#: Map sets are read into float64 arrays and copied by the Monte Carlo
#: budget (chunks of draws x slit pixels): four times the file size.
MAPS_MEMORY_FACTOR = 4.0

#: Seconds to wait for a Dask scheduler to answer before giving up.
DASK_CONNECT_TIMEOUT_S = 20.0

#: Environment variables that set the thread count of the math libraries
#: (OpenMP, OpenBLAS, MKL); the ``sample`` command sets them to 1 for the
#: local engine's workers unless the user set them.
_THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                     "MKL_NUM_THREADS")

_SAMPLE_KEYS = ("name", "recipes", "folder", "table", "output", "latex_style")
_ENGINE_KEYS = ("kind", "workers", "scheduler", "memory_fraction")
_RESULTS_ECSV = "results.ecsv"
_RESULTS_TEX = "results.tex"
_FAILURES_ECSV = "failures.ecsv"
_MANIFEST = "manifest.json"
_GALAXIES = "galaxies"


# -- the sample ---------------------------------------------------------------
@dataclass(frozen=True)
class EngineSettings:
    """Where the galaxies run.

    Attributes
    ----------
    kind : {"local", "dask", "serial"}
    workers : int
        Local engine: worker processes (0 = every usable core).
    scheduler : str
        Dask engine: address of the scheduler (``"tcp://host:8786"``).
    memory_fraction : float
        Local engine: share of the memory available at the start of the run
        (``MemAvailable`` of ``/proc/meminfo``) that running galaxies may
        use together, in (0, 1].
    """

    kind: str = "local"
    workers: int = 0
    scheduler: str = ""
    memory_fraction: float = 0.8


@dataclass(frozen=True)
class GalaxyEntry:
    """One galaxy of a sample.

    Attributes
    ----------
    galaxy : str
        Its name in tables and the run folder (the recipe's galaxy name, or
        else the recipe file's stem or ``row<N>`` of an inputs table).
    source : str
        Where it was defined: a recipe path or ``"<table> row N"``.
    session : Session or None
        ``None`` when the recipe is invalid (see ``error_type``/``message``);
        such a galaxy becomes a row of the failures table.
    error_type, message : str
        The recipe fault, when there is one.
    """

    galaxy: str
    source: str
    session: Session | None
    error_type: str = ""
    message: str = ""

    @property
    def folder_name(self) -> str:
        """The galaxy's subfolder name in ``galaxies/``."""
        return _slug(self.galaxy)


@dataclass(frozen=True)
class SampleSpec:
    """A validated sample file (see the module docstring).

    Attributes
    ----------
    name : str
    path : str
        The sample file.
    output_dir : str
        Absolute path of the run folder.
    galaxies : tuple of GalaxyEntry
        In the order of the sample file.
    engine : EngineSettings
    latex_style : {"aastex", "tabular"}
    """

    name: str
    path: str
    output_dir: str
    galaxies: tuple[GalaxyEntry, ...]
    engine: EngineSettings = field(default_factory=EngineSettings)
    latex_style: str = "aastex"


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._+-]+", "_", text).strip("._") or "galaxy"


def _check_keys(table: dict, known: Sequence[str], section: str,
                source: str) -> None:
    for key in table:
        if key not in known:
            raise RecipeError(f"unknown key; {_suggest(key, known)}",
                              path=source, keyword=f"{section}.{key}")


def _absolute_defaults(defaults: dict, base: Path, source: str) -> dict:
    """Check the ``[defaults]`` sections and make their paths absolute."""
    if not isinstance(defaults, dict):
        raise RecipeError("must be a table of recipe sections "
                          "([defaults.uncertainty] ...)", path=source,
                          keyword="defaults")
    out: dict[str, dict] = {}
    for section, values in defaults.items():
        if section not in SCHEMA:
            raise RecipeError(f"unknown recipe section; "
                              f"{_suggest(section, list(SCHEMA))}",
                              path=source, keyword=f"defaults.{section}")
        if not isinstance(values, dict):
            raise RecipeError("must be a table", path=source,
                              keyword=f"defaults.{section}")
        specs = {s.name: s for s in SCHEMA[section]}
        fixed = {}
        for key, value in values.items():
            if key not in specs and not (section == "slits" and key == "slit"):
                raise RecipeError(f"unknown key; {_suggest(key, specs)}",
                                  path=source,
                                  keyword=f"defaults.{section}.{key}")
            spec = specs.get(key)
            if spec is not None and spec.kind == "path" and \
                    isinstance(value, str) and value:
                p = Path(value).expanduser()
                value = str(p if p.is_absolute() else base / p)
            fixed[key] = value
        out[section] = fixed
    return out


def _merge(defaults: dict, doc: dict) -> dict:
    """``doc`` over ``defaults``, section by section (the recipe wins)."""
    merged = {k: (dict(v) if isinstance(v, dict) else v)
              for k, v in doc.items()}
    for section, values in defaults.items():
        own = merged.get(section)
        if own is None:
            merged[section] = dict(values)
        elif isinstance(own, dict):
            merged[section] = {**values, **own}
    return merged


def _entry(doc: dict, defaults: dict, *, base: Path, source: str,
           fallback: str, sample_path: str) -> GalaxyEntry:
    """Validate one galaxy's recipe mapping merged over the defaults."""
    raw_name = doc.get("galaxy", {}).get("name") if isinstance(
        doc.get("galaxy"), dict) else None
    try:
        if SESSION_SCHEMA in doc:  # a saved session file
            doc = dict(migrate(doc, source))
            doc.pop(SESSION_SCHEMA)
        session = session_from_dict(_merge(defaults, doc), base_dir=base,
                                    source=source, check_files=True)
    except GyrometerError as exc:
        exc = _blame_defaults(exc, doc, defaults, sample_path)
        name = raw_name if isinstance(raw_name, str) and raw_name else fallback
        return GalaxyEntry(name, source, None, type(exc).__name__, str(exc))
    return GalaxyEntry(session.name or fallback, source, session)


def _blame_defaults(exc: GyrometerError, doc: dict, defaults: dict,
                    sample_path: str) -> GyrometerError:
    """Point a recipe error at ``[defaults]`` when the value came from there."""
    key = exc.keyword or ""
    section, _, name = key.partition(".")
    own = doc.get(section, {})
    if name and name in defaults.get(section, {}) and \
            not (isinstance(own, dict) and name in own):
        return type(exc)(exc.message, path=sample_path,
                         keyword=f"defaults.{key}", value=exc.value,
                         hint=exc.hint)
    return exc


def _recipe_paths(sample: dict, base: Path, source: str) -> list[Path]:
    if "recipes" in sample:
        items = sample["recipes"]
        if isinstance(items, str):
            items = [items]
        if not isinstance(items, list) or not all(isinstance(i, str)
                                                  for i in items) or not items:
            raise RecipeError("must be a non-empty list of recipe files",
                              path=source, keyword="sample.recipes")
        paths: list[Path] = []
        for item in items:
            p = Path(item).expanduser()
            p = p if p.is_absolute() else base / p
            if any(c in item for c in "*?["):
                found = sorted(q for q in p.parent.glob(p.name) if q.is_file())
                if not found:
                    raise RecipeError(f"no file matches {item!r}", path=source,
                                      keyword="sample.recipes")
                paths.extend(found)
            elif not p.is_file():
                raise RecipeError(f"recipe not found: {p}", path=source,
                                  keyword="sample.recipes")
            else:
                paths.append(p)
        return paths
    item = sample["folder"]
    if not isinstance(item, str) or not item:
        raise RecipeError("must be a folder name", path=source,
                          keyword="sample.folder")
    folder = Path(item).expanduser()
    folder = folder if folder.is_absolute() else base / folder
    if not folder.is_dir():
        raise RecipeError(f"folder not found: {folder}", path=source,
                          keyword="sample.folder")
    paths = sorted(q for q in folder.glob("*.toml") if q.is_file())
    if not paths:
        raise RecipeError(f"no *.toml recipe in {folder}", path=source,
                          keyword="sample.folder")
    return paths


def _column_targets() -> dict[str, list[str]]:
    targets: dict[str, list[str]] = {}
    for section, specs in SCHEMA.items():
        for spec in specs:
            targets.setdefault(spec.name, []).append(section)
    return targets


def _cell_value(column, i: int, kind: str) -> Any:
    import numpy as np

    value = column[i]
    if np.ma.is_masked(value):
        return None
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, bytes):
        value = value.decode()
    if isinstance(value, str):
        value = value.strip()
        if value == "":
            return None
        if kind == "list":
            return [v.strip() for v in value.split(",") if v.strip()]
    if isinstance(value, float) and math.isnan(value):
        return None
    if kind in ("float", "float?") and isinstance(value, int) and \
            not isinstance(value, bool):
        value = float(value)
    return value


def _table_docs(table_path: Path, source: str) -> list[tuple[str, dict]]:
    """``(fallback name, recipe mapping)`` of every row of an inputs table."""
    from astropy.table import Table

    fmt = {".ecsv": "ascii.ecsv", ".csv": "ascii.csv"}.get(
        table_path.suffix.lower())
    if fmt is None:
        raise RecipeError("an inputs table must be .ecsv or .csv",
                          path=source, keyword="sample.table",
                          value=str(table_path))
    if not table_path.is_file():
        raise RecipeError(f"inputs table not found: {table_path}",
                          path=source, keyword="sample.table")
    try:
        table = Table.read(table_path, format=fmt)
    except Exception as exc:  # astropy raises many kinds on bad tables
        raise RecipeError(f"cannot read the inputs table ({exc})",
                          path=str(table_path)) from exc
    if len(table) == 0:
        raise RecipeError("the inputs table has no rows", path=str(table_path))
    targets = _column_targets()
    columns: list[tuple[str, str, str]] = []  # (column, section, key)
    for col in table.colnames:
        if col in ("name", "galaxy"):
            columns.append((col, "galaxy", "name"))
            continue
        section, dot, key = col.partition(".")
        if dot:
            names = [s.name for s in SCHEMA.get(section, ())]
            if section not in SCHEMA or key not in names:
                raise RecipeError(f"unknown column; "
                                  f"{_suggest(col, [f'{s}.{k.name}' for s in SCHEMA for k in SCHEMA[s]])}",
                                  path=str(table_path), keyword=col)
            columns.append((col, section, key))
            continue
        sections = targets.get(col)
        if not sections:
            raise RecipeError(f"unknown column; {_suggest(col, list(targets))}",
                              path=str(table_path), keyword=col)
        if len(sections) > 1:
            raise RecipeError(
                "ambiguous column name", path=str(table_path), keyword=col,
                hint="name it " + " or ".join(f"'{s}.{col}'" for s in sections))
        columns.append((col, sections[0], col))
    kinds = {(s, spec.name): spec.kind for s in SCHEMA for spec in SCHEMA[s]}
    docs = []
    for i in range(len(table)):
        doc: dict[str, dict] = {}
        for col, section, key in columns:
            value = _cell_value(table[col], i, kinds[(section, key)])
            if value is not None:
                doc.setdefault(section, {})[key] = value
        docs.append((f"row{i + 1}", doc))
    return docs


def load_sample(path: str | os.PathLike) -> SampleSpec:
    """Read and validate a sample file.

    Faults of the sample file itself (unknown keys, no or several galaxy
    sources, missing recipes or table, duplicate galaxy names) raise
    :class:`RecipeError` naming the file and the dotted key. A galaxy whose
    own recipe is invalid does not stop the sample: its entry carries the
    message and becomes a row of the failures table.

    Parameters
    ----------
    path : path-like
        The TOML sample file.
    """
    p = Path(path)
    source = str(p)
    doc = read_toml(p, RecipeError)
    for key in doc:
        if key not in ("sample", "engine", "defaults"):
            raise RecipeError(f"unknown section; "
                              f"{_suggest(key, ['sample', 'engine', 'defaults'])}",
                              path=source, keyword=key)
    sample = doc.get("sample")
    if not isinstance(sample, dict):
        raise RecipeError("a sample file needs a [sample] table", path=source,
                          keyword="sample",
                          hint="give recipes = [...], folder = ... or "
                               "table = ... in it")
    _check_keys(sample, _SAMPLE_KEYS, "sample", source)
    given = [k for k in ("recipes", "folder", "table") if k in sample]
    if len(given) != 1:
        raise RecipeError("give exactly one of recipes, folder or table"
                          + (f" (found {', '.join(given)})" if given else ""),
                          path=source, keyword="sample")
    base = p.resolve().parent
    name = sample.get("name", p.stem)
    output = sample.get("output", f"{p.stem}-run")
    style = sample.get("latex_style", "aastex")
    for key, value in (("name", name), ("output", output),
                       ("latex_style", style)):
        if not isinstance(value, str) or not value:
            raise RecipeError("must be a non-empty string", path=source,
                              keyword=f"sample.{key}", value=value)
    if style not in ("aastex", "tabular"):
        raise RecipeError("must be 'aastex' or 'tabular'", path=source,
                          keyword="sample.latex_style", value=style)
    engine = _engine_settings(doc.get("engine", {}), source)
    defaults = _absolute_defaults(doc.get("defaults", {}), base, source)
    entries: list[GalaxyEntry] = []
    if "table" in sample:
        if not isinstance(sample["table"], str) or not sample["table"]:
            raise RecipeError("must be a file name", path=source,
                              keyword="sample.table")
        tpath = Path(sample["table"]).expanduser()
        tpath = tpath if tpath.is_absolute() else base / tpath
        for k, (fallback, row) in enumerate(_table_docs(tpath, source), 1):
            entries.append(_entry(row, defaults, base=tpath.resolve().parent,
                                  source=f"{tpath} row {k}",
                                  fallback=fallback, sample_path=source))
    else:
        itself = p.resolve()
        for recipe in _recipe_paths(sample, base, source):
            if recipe.resolve() == itself:  # folder = "." or a wide glob
                continue
            fallback = recipe.name.split(".")[0]
            try:
                rdoc = read_toml(recipe, RecipeError)
            except RecipeError as exc:
                entries.append(GalaxyEntry(fallback, str(recipe), None,
                                           "RecipeError", str(exc)))
                continue
            entries.append(_entry(rdoc, defaults, base=recipe.resolve().parent,
                                  source=str(recipe), fallback=fallback,
                                  sample_path=source))
    seen: dict[str, str] = {}
    for e in entries:
        folder = e.folder_name.lower()  # case-insensitive file systems
        if folder in seen:
            raise RecipeError(f"two galaxies share the name {e.galaxy!r} "
                              f"({seen[folder]} and {e.source})", path=source,
                              keyword="galaxy.name",
                              hint="give each recipe a distinct [galaxy] name")
        seen[folder] = e.source
    out = Path(output).expanduser()
    out = out if out.is_absolute() else base / out
    return SampleSpec(name=name, path=source, output_dir=str(out),
                      galaxies=tuple(entries), engine=engine,
                      latex_style=style)


def _engine_settings(raw: Any, source: str) -> EngineSettings:
    if not isinstance(raw, dict):
        raise RecipeError("must be a table", path=source, keyword="engine")
    _check_keys(raw, _ENGINE_KEYS, "engine", source)
    settings = EngineSettings(**raw)
    return _checked_engine(settings, source)


def _checked_engine(settings: EngineSettings, source: str | None
                    ) -> EngineSettings:
    kind, workers = settings.kind, settings.workers
    if kind not in ENGINES:
        raise RecipeError(f"must be one of {', '.join(map(repr, ENGINES))}",
                          path=source, keyword="engine.kind", value=kind)
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
        raise RecipeError("must be a whole number >= 0 (0 = every core)",
                          path=source, keyword="engine.workers", value=workers)
    if not isinstance(settings.scheduler, str):
        raise RecipeError("must be a string such as 'tcp://host:8786'",
                          path=source, keyword="engine.scheduler",
                          value=settings.scheduler)
    frac = settings.memory_fraction
    if isinstance(frac, bool) or not isinstance(frac, (int, float)) or \
            not (0.0 < frac <= 1.0):
        raise RecipeError("must be a number in (0, 1]", path=source,
                          keyword="engine.memory_fraction", value=frac)
    if kind == "dask" and not settings.scheduler:
        raise RecipeError("the dask engine needs the scheduler address",
                          path=source, keyword="engine.scheduler",
                          hint="e.g. scheduler = 'tcp://127.0.0.1:8786'")
    return replace(settings, memory_fraction=float(frac))


# -- checksums and memory -------------------------------------------------------
def _input_files(session: Session) -> list[tuple[str, str]]:
    """``(role, path)`` of every file a galaxy reads."""
    files = list(session.input.files().items())
    if session.rotation.source == "file" and session.rotation.file:
        files.append(("rotation_curve", session.rotation.file))
    return files


def _sha256_cached(path: str, cache: dict) -> str:
    """SHA-256 of a file, reusing ``cache[path]`` while size and mtime match."""
    path = os.path.realpath(path)
    st = os.stat(path)
    hit = cache.get(path)
    if isinstance(hit, dict) and hit.get("size") == st.st_size and \
            hit.get("mtime_ns") == st.st_mtime_ns and hit.get("sha256"):
        return hit["sha256"]
    digest = sha256_file(path)
    cache[path] = {"size": st.st_size, "mtime_ns": st.st_mtime_ns,
                   "sha256": digest}
    return digest


def galaxy_key(session: Session, checksums: dict[str, str]) -> str:
    """Checksum that recognises a finished galaxy on a restart.

    SHA-256 of a JSON text holding the SHA-256 of every input file (by
    role) and the session's settings as TOML
    (:func:`gyrometer.core.session.session_to_toml`, without comments), with
    the file paths and the output folder blanked: moving the data or the
    run folder keeps the key; changing a byte of an input or any setting
    changes it.

    Parameters
    ----------
    session : Session
    checksums : dict
        ``{role: hex digest}`` of the files of :func:`_input_files`.
    """
    blank = {f.name: "" for f in dataclasses.fields(session.input)
             if f.name not in ("kind", "sha256")}
    norm = session.with_(
        input=replace(session.input, sha256=(), **blank),
        rotation=replace(session.rotation, file=""),
        output=replace(session.output, folder=""))
    text = json.dumps({"inputs": sorted(checksums.items()),
                       "settings": session_to_toml(norm, header=False,
                                                   comments=False)},
                      sort_keys=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def estimate_memory_bytes(session: Session) -> int:
    """Memory one galaxy is expected to need while it runs, bytes.

    The rule (local engine): ``BASE_MEMORY_BYTES`` (256 MiB for the worker
    process, its libraries and the figures) + ``CUBE_MEMORY_FACTOR`` (1.25)
    x the cube file size (its memory-mapped pages may all become resident as
    the cube is streamed) + ``MAPS_MEMORY_FACTOR`` (4) x the size of the map
    files (float64 copies and Monte Carlo chunks). Missing files count as 0.
    """
    total = float(BASE_MEMORY_BYTES)
    for role, path in session.input.files().items():
        try:
            size = os.path.getsize(path)
        except OSError:
            continue
        total += size * (CUBE_MEMORY_FACTOR if role == "cube"
                         else MAPS_MEMORY_FACTOR)
    return int(total)


def available_memory_bytes() -> int | None:
    """Memory available to new work: ``MemAvailable`` of ``/proc/meminfo``.

    Falls back on the free physical pages (``os.sysconf``) where there is
    no ``/proc``; ``None`` if neither is known.
    """
    with contextlib.suppress(OSError, ValueError):
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    with contextlib.suppress(AttributeError, ValueError, OSError):
        return int(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    return None


def _usable_cores() -> int:
    with contextlib.suppress(AttributeError, OSError):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


# -- the per-galaxy work ----------------------------------------------------------
@dataclass(frozen=True)
class GalaxyTask:
    """Everything a worker needs for one galaxy (picklable, small).

    Attributes
    ----------
    galaxy, source : str
        As in :class:`GalaxyEntry`.
    session : Session
        With the run's output folder and the input checksums filled in.
    key : str
        :func:`galaxy_key` of the session.
    overwrite : bool
        Replace earlier outputs (they belong to this run folder).
    cancel_path : str
        A file whose existence means "stop" (engines in other processes).
    notes : tuple of str
        Notes of the scheduler, passed on to the outcome.
    """

    galaxy: str
    source: str
    session: Session
    key: str
    overwrite: bool = False
    cancel_path: str = ""
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class GalaxyOutcome:
    """What one galaxy's run returned (plain data, cheap to send back).

    Attributes
    ----------
    galaxy, source, key : str
    status : {"done", "failed", "cancelled"}
    outputs : dict
        Kind -> path of every file written (``export_result``).
    row : dict or None
        The galaxy's :class:`~gyrometer.core.tables.ResultRow` as plain data.
    error_type, message : str
        For a failure: the exception's class name and message.
    duration_s : float
        Wall time of the galaxy, seconds.
    warnings : tuple of str
        Notes of the run and warnings caught while it ran.
    worker : str
        ``host:pid`` of the process that ran it.
    """

    galaxy: str
    source: str
    key: str
    status: str
    outputs: dict = field(default_factory=dict)
    row: dict | None = None
    error_type: str = ""
    message: str = ""
    duration_s: float = 0.0
    warnings: tuple[str, ...] = ()
    worker: str = ""


class _FileFlag:
    """A cancel flag shared with worker processes through a file."""

    def __init__(self, path: str) -> None:
        self.path = path

    def is_set(self) -> bool:
        return bool(self.path) and os.path.exists(self.path)


def run_galaxy(task: GalaxyTask, cancel: CancelFlag | None = None
               ) -> GalaxyOutcome:
    """Run and export one galaxy; never raises for a fault of the galaxy.

    The same function runs in every engine. It calls
    :func:`gyrometer.core.pipeline.run_session` and
    :func:`gyrometer.core.pipeline.export_result` (into the task's output
    folder). A :class:`GyrometerError` becomes a ``"failed"`` outcome with
    its message; any other exception too, with its type and message (a bug:
    no traceback reaches the user). Warnings raised meanwhile are recorded
    in the outcome, so every engine behaves alike.

    Parameters
    ----------
    task : GalaxyTask
    cancel : object with ``is_set()``, optional
        Default: the task's cancel file.
    """
    start = time.perf_counter()
    worker = f"{socket.gethostname()}:{os.getpid()}"
    flag = cancel if cancel is not None else _FileFlag(task.cancel_path)
    caught: list[warnings.WarningMessage] = []

    def outcome(status: str, **kw) -> GalaxyOutcome:
        notes = list(task.notes) + list(kw.pop("notes", ()))
        notes += [f"{w.category.__name__}: {w.message}" for w in caught]
        return GalaxyOutcome(task.galaxy, task.source, task.key, status,
                             duration_s=time.perf_counter() - start,
                             warnings=tuple(dict.fromkeys(notes)),
                             worker=worker, **kw)

    try:
        with warnings.catch_warnings(record=True) as caught_now:
            warnings.simplefilter("always")
            caught = caught_now
            from .pipeline import export_result, run_session
            result = run_session(task.session, cancel=flag)
            paths = export_result(result, overwrite=task.overwrite,
                                  cancel=flag)
    except Cancelled as exc:
        return outcome("cancelled", error_type="Cancelled", message=str(exc))
    except GyrometerError as exc:
        return outcome("failed", error_type=type(exc).__name__,
                       message=str(exc))
    except Exception as exc:  # a bug or a system fault: record, go on
        return outcome("failed", error_type=type(exc).__name__,
                       message=f"{exc} (unexpected error; please report it)")
    return outcome("done", outputs={k: str(v) for k, v in paths.items()},
                   row=dataclasses.asdict(result.row),
                   notes=result.warnings)


# -- engines --------------------------------------------------------------------
class _SerialEngine:
    """In this process, one galaxy at a time (the reference)."""

    kind = "serial"

    def __init__(self, cancel: CancelFlag | None) -> None:
        self.cancel = cancel
        self.workers = 1
        self.capacity = 1

    def submit(self, task: GalaxyTask):
        from concurrent.futures import Future

        fut: Future = Future()
        fut.set_result(run_galaxy(task, cancel=self.cancel))
        return fut

    def wait(self, futures, timeout: float):
        return {f for f in futures if f.done()}

    def admits(self, need: int, running: Sequence[int]) -> bool:
        return not running

    def lost(self, exc: BaseException, fut) -> bool:
        return False

    def stop(self, futures) -> None:
        pass

    def close(self, wait: bool = True) -> None:
        pass


def _ignore_interrupts() -> None:
    """Pool workers ignore Ctrl-C: the parent stops them through the cancel
    file, so no worker prints a traceback."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)


class _LocalEngine:
    """A process pool on this machine, holding back work that would not fit
    in memory (see :func:`estimate_memory_bytes`)."""

    kind = "local"

    def __init__(self, workers: int, memory_fraction: float) -> None:
        self.workers = workers
        self.capacity = workers
        available = available_memory_bytes()
        self.budget = None if available is None else \
            int(memory_fraction * available)
        self._new_pool()

    def _new_pool(self) -> None:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        method = ("forkserver" if "forkserver" in
                  multiprocessing.get_all_start_methods() else "spawn")
        self.pool = ProcessPoolExecutor(
            max_workers=self.workers,
            mp_context=multiprocessing.get_context(method),
            initializer=_ignore_interrupts)

    def submit(self, task: GalaxyTask):
        fut = self.pool.submit(run_galaxy, task)
        fut.gyrometer_pool = self.pool  # which pool, should it break
        return fut

    def wait(self, futures, timeout: float):
        from concurrent.futures import FIRST_COMPLETED, wait

        done, _ = wait(list(futures), timeout=timeout,
                       return_when=FIRST_COMPLETED)
        return done

    def admits(self, need: int, running: Sequence[int]) -> bool:
        if not running or self.budget is None:
            return True
        return sum(running) + need <= self.budget

    def lost(self, exc: BaseException, fut) -> bool:
        """A worker died (killed, out of memory): start a fresh pool, once
        per broken pool (every galaxy running in it reports the break)."""
        from concurrent.futures.process import BrokenProcessPool

        if isinstance(exc, BrokenProcessPool) and \
                getattr(fut, "gyrometer_pool", None) is self.pool:
            self.pool.shutdown(wait=False, cancel_futures=True)
            self._new_pool()
            return True
        return False

    def stop(self, futures) -> None:
        for f in futures:
            f.cancel()

    def close(self, wait: bool = True) -> None:
        self.pool.shutdown(wait=wait, cancel_futures=True)


class _DaskEngine:
    """An existing ``dask.distributed`` cluster (Dask does the placing)."""

    kind = "dask"

    def __init__(self, scheduler: str) -> None:
        try:
            from distributed import Client
        except ImportError as exc:
            raise GyrometerError(
                "the dask engine needs the 'distributed' package",
                keyword="engine.kind", value="dask",
                hint="install it with: pip install 'gyrometer[dask]', or use "
                     "the local engine") from exc
        try:
            self.client = Client(scheduler, timeout=DASK_CONNECT_TIMEOUT_S,
                                 set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise GyrometerError(f"cannot reach the Dask scheduler ({exc})",
                                 keyword="engine.scheduler", value=scheduler,
                                 hint="check the address (tcp://host:port) "
                                      "and that the scheduler is running"
                                 ) from exc
        self.workers = max(1, sum(self.client.nthreads().values()))
        self.capacity = 2 * self.workers  # keep every worker thread fed

    def submit(self, task: GalaxyTask):
        return self.client.submit(run_galaxy, task, pure=False)

    def wait(self, futures, timeout: float):
        # distributed.wait would need this client as the process default;
        # polling the futures' states keeps the client private
        end = time.monotonic() + timeout
        while True:
            done = {f for f in futures if f.done()}
            if done or time.monotonic() >= end:
                return done
            time.sleep(0.05)

    def admits(self, need: int, running: Sequence[int]) -> bool:
        return True  # worker memory limits are the cluster's business

    def lost(self, exc: BaseException, fut) -> bool:
        return False

    def stop(self, futures) -> None:
        self.client.cancel(list(futures))

    def close(self, wait: bool = True) -> None:
        self.client.close()


# -- progress -------------------------------------------------------------------
@dataclass(frozen=True)
class SampleStatus:
    """Counts of a sample run, for a progress display.

    Attributes
    ----------
    total : int
    done : int
        Finished galaxies, including ``skipped`` ones finished earlier.
    skipped : int
        Finished by an earlier run (same checksum), not run again.
    running, failed, pending : int
        ``running`` is the work handed to the engine (on Dask, queued tasks
        count as running).
    elapsed_s : float
    eta_s : float or None
        Mean duration of the galaxies finished in this run (failed ones
        only while none has finished) x (pending + running) / workers;
        ``None`` until one has ended.
    last : str
        What just happened, in a few words.
    """

    total: int
    done: int
    skipped: int
    running: int
    failed: int
    pending: int
    elapsed_s: float
    eta_s: float | None
    last: str = ""

    def text(self) -> str:
        """``"3/10 done, 2 running, 1 failed, 4 pending, about 2 min left"``."""
        parts = [f"{self.done}/{self.total} done", f"{self.running} running",
                 f"{self.failed} failed", f"{self.pending} pending"]
        if self.eta_s is not None and (self.running or self.pending):
            parts.append(f"about {_duration(self.eta_s)} left")
        return ", ".join(parts)


def _duration(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


# -- the run ----------------------------------------------------------------------
@dataclass(frozen=True)
class SampleRun:
    """Summary of :func:`run_sample`.

    Attributes
    ----------
    output_dir : Path
    results_ecsv, results_tex : Path or None
        The merged table (``None`` when no galaxy has finished).
    failures_ecsv : Path
    manifest : Path
    outcomes : tuple of GalaxyOutcome
        Galaxies run (or found invalid) by *this* run, in sample order.
    skipped : tuple of str
        Galaxies finished by an earlier run and not run again.
    n_total, n_done, n_failed : int
        ``n_done`` counts skipped galaxies too.
    elapsed_s : float
    """

    output_dir: Path
    results_ecsv: Path | None
    results_tex: Path | None
    failures_ecsv: Path
    manifest: Path
    outcomes: tuple[GalaxyOutcome, ...]
    skipped: tuple[str, ...]
    n_total: int
    n_done: int
    n_failed: int
    elapsed_s: float


def _read_manifest(path: Path) -> dict:
    if not path.is_file():
        return {"galaxies": {}, "checksums": {}}
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise OutputError(f"the run manifest cannot be read ({exc})",
                          path=str(path),
                          hint="choose another output folder, or move this "
                               "file away to start the run afresh") from exc
    if not isinstance(doc, dict) or doc.get("schema") != MANIFEST_SCHEMA:
        raise OutputError(f"not a {MANIFEST_SCHEMA} manifest", path=str(path),
                          hint="choose another output folder")
    if doc.get("schema_version") != MANIFEST_SCHEMA_VERSION:
        raise OutputError(f"manifest version {doc.get('schema_version')!r} "
                          f"is not supported (this Gyrometer writes "
                          f"{MANIFEST_SCHEMA_VERSION})", path=str(path),
                          hint="choose another output folder")
    doc.setdefault("galaxies", {})
    doc.setdefault("checksums", {})
    return doc


def _write_manifest(path: Path, spec: SampleSpec, manifest: dict) -> None:
    from . import __version__
    from .safeio import write_text_atomic

    doc = {"schema": MANIFEST_SCHEMA,
           "schema_version": MANIFEST_SCHEMA_VERSION,
           "sample": spec.path, "name": spec.name, "gyrometer": __version__,
           "galaxies": manifest["galaxies"],
           "checksums": manifest["checksums"]}
    write_text_atomic(path, json.dumps(doc, indent=1, sort_keys=True) + "\n",
                      overwrite=True)


def _finished(record: dict | None, key: str, run_dir: Path) -> bool:
    if not isinstance(record, dict) or record.get("status") != "done" or \
            record.get("key") != key:
        return False
    outputs = record.get("outputs", {})
    table = outputs.get("table.ecsv")
    return bool(table) and all((run_dir / p).is_file()
                               for p in outputs.values())


def _relative(path: str, base: Path) -> str:
    with contextlib.suppress(ValueError):
        return os.path.relpath(path, base)
    return path


def _record(outcome: GalaxyOutcome, run_dir: Path) -> dict:
    rec: dict[str, Any] = {
        "status": outcome.status, "key": outcome.key,
        "source": outcome.source, "duration_s": round(outcome.duration_s, 3),
        "worker": outcome.worker,
        "finished_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
    if outcome.status == "done":
        rec["outputs"] = {k: _relative(v, run_dir)
                          for k, v in outcome.outputs.items()}
    else:
        rec["error_type"] = outcome.error_type
        rec["message"] = outcome.message
    return rec


def _make_engine(settings: EngineSettings, cancel):
    if settings.kind == "serial":
        return _SerialEngine(cancel)
    if settings.kind == "dask":
        return _DaskEngine(settings.scheduler)
    return _LocalEngine(settings.workers or _usable_cores(),
                        settings.memory_fraction)


def _check_folder(run_dir: Path, overwrite: bool) -> None:
    manifest = run_dir / _MANIFEST
    if run_dir.exists() and not run_dir.is_dir():
        raise OutputError("the run folder is a file", path=str(run_dir))
    if run_dir.is_dir() and not manifest.exists() and \
            any(run_dir.iterdir()) and not overwrite:
        raise OutputError("the run folder exists, is not empty and holds no "
                          "sample manifest", path=str(run_dir),
                          hint="choose another output folder, or use --force "
                               "to write into it")


def _make_folder(run_dir: Path) -> None:
    try:
        (run_dir / _GALAXIES).mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the run folder ({exc.strerror})",
                          path=str(run_dir)) from exc


def run_sample(spec: SampleSpec, *, engine: str | None = None,
               workers: int | None = None, scheduler: str | None = None,
               output_dir: str | os.PathLike | None = None,
               overwrite: bool = False,
               progress: ProgressCallback | None = None,
               status: Callable[[SampleStatus], None] | None = None,
               cancel: CancelFlag | None = None) -> SampleRun:
    """Run every galaxy of a sample; write the merged and failures tables.

    Parameters
    ----------
    spec : SampleSpec
        From :func:`load_sample`.
    engine, workers, scheduler : optional
        Override the sample file's ``[engine]`` (``engine`` one of
        :data:`ENGINES`).
    output_dir : path-like, optional
        Override the run folder.
    overwrite : bool
        Write into a non-empty folder without a manifest, replacing files.
        (Outputs of galaxies recorded in the manifest are always replaced
        when the galaxy runs again: they belong to the run.)
    progress : callable, optional
        ``progress(finished, total, text)`` (house protocol,
        :mod:`gyrometer.core.progress`), called when a galaxy starts or ends.
    status : callable, optional
        ``status(SampleStatus)`` with the counts and the time left.
    cancel : object with ``is_set()``, optional
        When set, no further galaxy starts, running ones stop at their next
        check, the finished ones are kept, and :class:`Cancelled` is raised
        after the tables are written.

    Returns
    -------
    SampleRun

    Raises
    ------
    OutputError
        The run folder cannot be used.
    GyrometerError
        The engine cannot start (e.g. no Dask scheduler at the address).
    Cancelled
        ``cancel`` was set or the run was interrupted (Ctrl-C); a later run
        continues where this one stopped.
    """
    t0 = time.monotonic()
    settings = spec.engine
    changes = {k: v for k, v in (("kind", engine), ("workers", workers),
                                 ("scheduler", scheduler)) if v is not None}
    if changes:
        settings = _checked_engine(replace(settings, **changes), None)
    run_dir = Path(output_dir if output_dir is not None
                   else spec.output_dir).resolve()
    _check_folder(run_dir, overwrite)
    manifest_path = run_dir / _MANIFEST
    manifest = _read_manifest(manifest_path)
    records: dict = manifest["galaxies"]
    cache: dict = manifest["checksums"]
    cancel_path = run_dir / f".cancel-{os.getpid()}-{time.time_ns()}"

    outcomes: dict[str, GalaxyOutcome] = {}
    skipped: list[str] = []
    queue: deque = deque()
    for entry in spec.galaxies:
        if entry.session is None:  # invalid recipe: a failure row now
            outcomes[entry.galaxy] = GalaxyOutcome(
                entry.galaxy, entry.source, "", "failed",
                error_type=entry.error_type, message=entry.message)
            continue
        old = records.get(entry.galaxy)
        if isinstance(old, dict) and old.get("status") == "done":
            prepared = _prepare_task(entry, run_dir, cache,
                                     str(cancel_path))
            if isinstance(prepared, GalaxyTask) and \
                    _finished(old, prepared.key, run_dir):
                skipped.append(entry.galaxy)
                continue
        queue.append(entry)
    n_total = len(spec.galaxies)
    durations: list[float] = []
    running: dict = {}  # future -> (task, memory estimate)
    eng = None

    def tell(text: str) -> None:
        n_failed = sum(o.status == "failed" for o in outcomes.values())
        n_done = len(skipped) + sum(o.status == "done"
                                    for o in outcomes.values())
        pending = len(queue)
        n_workers = getattr(eng, "workers", 1) or 1
        # failures are usually quick: the mean of finished galaxies is the
        # better guide when there are any
        pool = [o.duration_s for o in outcomes.values()
                if o.status == "done" and o.key] or durations
        eta = (None if not pool else
               sum(pool) / len(pool) * (pending + len(running)) / n_workers)
        state = SampleStatus(n_total, n_done, len(skipped), len(running),
                             n_failed, pending, time.monotonic() - t0, eta,
                             text)
        if status is not None:
            status(state)
        report(progress, n_done + n_failed, n_total, state.text())

    def finish(outcome: GalaxyOutcome) -> None:
        if outcome.status == "cancelled":
            return  # stays pending: runs again next time
        outcomes[outcome.galaxy] = outcome
        durations.append(outcome.duration_s)
        records[outcome.galaxy] = _record(outcome, run_dir)
        _write_manifest(manifest_path, spec, manifest)
        tell(f"{outcome.galaxy} {outcome.status}")

    if queue:  # before writing anything: the engine may fail to start
        eng = _make_engine(settings, cancel)
    stopped = False
    try:
        _make_folder(run_dir)
        _write_manifest(manifest_path, spec, manifest)  # a run folder now
        tell("started")
        while queue or running:
            if cancel is not None and cancel.is_set() and not stopped:
                stopped = True
                cancel_path.touch()
                eng.stop(list(running))
                queue.clear()
            while queue and not stopped and len(running) < eng.capacity:
                entry = queue[0]
                prepared = _prepare_task(entry, run_dir, cache,
                                         str(cancel_path))
                if isinstance(prepared, GalaxyOutcome):
                    queue.popleft()
                    finish(prepared)
                    continue
                if _finished(records.get(entry.galaxy), prepared.key,
                             run_dir):
                    queue.popleft()
                    skipped.append(entry.galaxy)
                    tell(f"{entry.galaxy} finished earlier")
                    continue
                need = estimate_memory_bytes(prepared.session)
                if not eng.admits(need, [m for _, m in running.values()]):
                    break  # wait until running galaxies free memory
                budget = getattr(eng, "budget", None)
                if budget is not None and need > budget:
                    prepared = replace(prepared, notes=(
                        f"estimated memory need {need / 2**30:.1f} GiB "
                        f"exceeds the memory budget {budget / 2**30:.1f} "
                        "GiB; it ran alone",))
                queue.popleft()
                running[eng.submit(prepared)] = (prepared, need)
                tell(f"{entry.galaxy} started")
            if not running:
                continue
            for fut in eng.wait(running, timeout=0.5):
                task, _ = running.pop(fut)
                if fut.cancelled():
                    continue
                try:
                    outcome = fut.result()
                except Exception as exc:  # the engine lost the galaxy
                    broken = eng.lost(exc, fut)
                    why = ("a worker process stopped abruptly (killed, out "
                           "of memory or crashed) while this galaxy ran"
                           if broken or "BrokenProcessPool" in
                           type(exc).__name__ else
                           f"the engine lost this galaxy ({exc})")
                    outcome = GalaxyOutcome(
                        task.galaxy, task.source, task.key,
                        "cancelled" if stopped else "failed",
                        error_type=type(exc).__name__,
                        message=f"{why}; it is tried again on the next run")
                finish(outcome)
    except KeyboardInterrupt:  # Ctrl-C: running galaxies stop at their
        stopped = True            # next check; finished ones are kept
        with contextlib.suppress(OSError):
            cancel_path.touch()
        if eng is not None:
            eng.stop(list(running))
            eng.close(wait=True)
            eng = None
    finally:
        if eng is not None:
            eng.close()
        with contextlib.suppress(OSError):
            cancel_path.unlink()
    _write_manifest(manifest_path, spec, manifest)
    ecsv, tex = _write_merged(spec, run_dir, records, skipped, outcomes)
    failures = _write_failures(spec, run_dir, outcomes)
    ordered = tuple(outcomes[e.galaxy] for e in spec.galaxies
                    if e.galaxy in outcomes)
    n_done = len(skipped) + sum(o.status == "done" for o in ordered)
    n_failed = sum(o.status == "failed" for o in ordered)
    if stopped:
        raise Cancelled(
            f"sample run stopped with {n_done} of {n_total} galaxies "
            f"finished and {n_failed} failed; the finished ones are kept in "
            f"{run_dir} "
            "(run the same command again to continue)")
    return SampleRun(run_dir, ecsv, tex, failures, manifest_path, ordered,
                     tuple(skipped), n_total, n_done, n_failed,
                     time.monotonic() - t0)


def _prepare_task(entry: GalaxyEntry, run_dir: Path, cache: dict,
                  cancel_path: str) -> GalaxyTask | GalaxyOutcome:
    """The task of a galaxy (checksums, run folder), or its failure."""
    session = entry.session
    assert session is not None
    sums: dict[str, str] = {}
    try:
        for role, path in _input_files(session):
            sums[role] = _sha256_cached(path, cache)
    except OSError as exc:
        return GalaxyOutcome(entry.galaxy, entry.source, "", "failed",
                             error_type="InputFileError",
                             message=f"{exc.filename}: cannot read the file "
                                     f"({exc.strerror})")
    key = galaxy_key(session, sums)
    recorded = dict(session.input.sha256)
    input_sums = tuple(sorted({**{r: s for r, s in sums.items()
                                  if r != "rotation_curve"},
                               **recorded}.items()))
    tables = session.output.tables
    if "ecsv" not in tables:
        tables = tuple(tables) + ("ecsv",)
    folder = run_dir / _GALAXIES / entry.folder_name
    session = session.with_(
        input=replace(session.input, sha256=input_sums),
        budget=replace(session.budget, workers=1),
        output=replace(session.output, folder=str(folder), tables=tables))
    # the galaxy folders belong to the run (a new folder must be empty or
    # --force given, see _check_folder), so a re-run replaces its outputs
    return GalaxyTask(entry.galaxy, entry.source, session, key,
                      overwrite=True, cancel_path=cancel_path)


def _write_merged(spec: SampleSpec, run_dir: Path, records: dict,
                  skipped: list[str], outcomes: dict):
    from .tables import merge_results, write_ecsv, write_latex

    files = []
    for entry in spec.galaxies:
        rec = records.get(entry.galaxy)
        fresh = outcomes.get(entry.galaxy)
        ok = (entry.galaxy in skipped or
              (fresh is not None and fresh.status == "done"))
        if ok and isinstance(rec, dict) and rec.get("status") == "done":
            files.append(run_dir / rec["outputs"]["table.ecsv"])
    if not files:
        return None, None
    table = merge_results(files)
    table.meta["gyrometer"]["sample"] = {"name": spec.name, "file": spec.path}
    ecsv = write_ecsv(table, run_dir / _RESULTS_ECSV, overwrite=True)
    tex = write_latex(table, run_dir / _RESULTS_TEX, style=spec.latex_style,
                      overwrite=True, caption=f"Bar pattern speeds: "
                                              f"{spec.name}")
    return ecsv, tex


def _write_failures(spec: SampleSpec, run_dir: Path, outcomes: dict) -> Path:
    from astropy.table import Column, Table

    from .tables import write_ecsv

    rows = [o for e in spec.galaxies
            if (o := outcomes.get(e.galaxy)) is not None and o.status == "failed"]
    inputs = {e.galaxy: ", ".join(os.path.normpath(p) for p in
                                  e.session.input.files().values())
              if e.session is not None else "" for e in spec.galaxies}
    table = Table()
    for name, values, desc in (
            ("galaxy", [o.galaxy for o in rows], "Galaxy name"),
            ("recipe", [o.source for o in rows],
             "Recipe file or inputs-table row"),
            ("input", [inputs.get(o.galaxy, "") for o in rows],
             "Input data file(s)"),
            ("error_type", [o.error_type for o in rows],
             "Class of the error"),
            ("message", [o.message for o in rows], "What went wrong")):
        table.add_column(Column(values, name=name, dtype=str,
                                description=desc))
    table.meta["gyrometer"] = {"schema": "gyrometer-sample-failures",
                               "schema_version": 1, "sample": spec.path,
                               "note": "failed galaxies are tried again when "
                                       "the sample is run again"}
    return write_ecsv(table, run_dir / _FAILURES_ECSV, overwrite=True)


# -- command line ---------------------------------------------------------------
_SAMPLE_HELP = """\
Run every galaxy of a sample file in parallel and write one merged table.

The sample file (TOML) lists recipes (or a folder of them, or a table of
inputs) and the settings they share in [defaults]; see the user guide.
Outputs go to the run folder: galaxies/<name>/ (each galaxy's tables,
figures, regions, session), results.ecsv and results.tex (merged table),
failures.ecsv (one row per failed galaxy) and manifest.json. Run the same
command again after a stop or crash: finished galaxies are skipped (same
inputs and settings), failed ones are tried again.
"""


def add_sample_subcommand(subparsers) -> argparse.ArgumentParser:
    """Add the ``sample`` subcommand to the ``gyrometer`` command's parser.

    ``subparsers`` is the object returned by ``add_subparsers``; the new
    parser's ``func`` default is :func:`run_sample_command`.
    """
    p = subparsers.add_parser(
        "sample", formatter_class=argparse.RawDescriptionHelpFormatter,
        help="run a whole sample of galaxies in parallel",
        description=_SAMPLE_HELP)
    p.add_argument("sample", metavar="SAMPLE", help="sample file (TOML)")
    p.add_argument("-o", "--output-dir", metavar="FOLDER",
                   help="run folder (default: the sample file's [sample] "
                        "output)")
    p.add_argument("--engine", choices=ENGINES,
                   help="where galaxies run (default: the sample file's, "
                        "else local)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local engine: worker processes (default: every core)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="dask engine: scheduler address, e.g. "
                        "tcp://127.0.0.1:8786 (implies --engine dask)")
    p.add_argument("--check", action="store_true",
                   help="validate the sample and list its galaxies; run "
                        "nothing")
    p.add_argument("--force", action="store_true",
                   help="write into a non-empty folder that holds no run")
    g = p.add_mutually_exclusive_group()
    g.add_argument("-q", "--quiet", action="store_true",
                   help="print nothing but errors")
    g.add_argument("-v", "--verbose", action="store_true",
                   help="list every failure in full")
    p.set_defaults(func=run_sample_command)
    return p


def run_sample_command(args, bar=None, cancel=None) -> int:
    """Carry out ``gyrometer sample``; returns the exit status.

    0: every galaxy finished; 1: some failed (see failures.ecsv); 3: stopped
    (finished galaxies are kept). Other faults raise
    :class:`GyrometerError` for the command's one error handler.
    """
    def say(text: str) -> None:
        if not args.quiet:
            print(text, flush=True)

    spec = load_sample(args.sample)
    if args.check:
        say(f"{spec.path}: {len(spec.galaxies)} galaxies, engine "
            f"{spec.engine.kind}, run folder {spec.output_dir}")
        bad = 0
        for e in spec.galaxies:
            if e.session is None:
                bad += 1
                say(f"  {e.galaxy}: INVALID: {e.message}")
            else:
                say(f"  {e.galaxy}: {e.source}")
        return 1 if bad else 0
    engine = args.engine
    if args.scheduler and engine is None:
        engine = "dask"
    if (engine or spec.engine.kind) == "local":
        # one math-library thread per worker process, as Dask's nanny does
        # for its workers: N workers x N threads on N cores oversubscribe
        # (the workers start after this, so they read it; a value the user
        # set is kept)
        for var in _THREAD_VARIABLES:
            os.environ.setdefault(var, "1")
    if bar is None and not args.quiet:
        from .cli import ProgressBar
        bar = ProgressBar()
    try:
        run = run_sample(spec, engine=engine, workers=args.workers,
                         scheduler=args.scheduler,
                         output_dir=args.output_dir, overwrite=args.force,
                         progress=bar, cancel=cancel)
    except Cancelled as exc:
        if bar is not None:
            bar.close()
        print(f"gyrometer: {exc}", file=sys.stderr)
        return 3
    finally:
        if bar is not None:
            bar.close()
    say(f"{spec.name}: {run.n_done} of {run.n_total} galaxies finished"
        + (f" ({len(run.skipped)} by an earlier run)" if run.skipped else "")
        + f", {run.n_failed} failed, in {_duration(run.elapsed_s)}")
    if run.results_ecsv is not None:
        say(f"  merged table: {run.results_ecsv} and {run.results_tex}")
    if run.n_failed:
        say(f"  failures: {run.failures_ecsv}")
        failed = [o for o in run.outcomes if o.status == "failed"]
        for o in failed if args.verbose else failed[:5]:
            say(f"    {o.galaxy}: {o.error_type}: {o.message}")
        if not args.verbose and len(failed) > 5:
            say(f"    ... {len(failed) - 5} more (-v lists all)")
    return 1 if run.n_failed else 0
