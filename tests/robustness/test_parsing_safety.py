"""Safety of parsing: nothing read from a file is ever executed.

* A static check of every module of ``gyrometer.core``: no ``eval``,
  ``exec``, ``compile``, ``pickle``/``marshal``/``shelve``/``dill`` loading,
  ``yaml.load`` without a safe loader, ``numpy.load`` with
  ``allow_pickle=True``, ``importlib.import_module``/``__import__`` or
  ``os.system``/``subprocess`` with a shell.
* A hostile pickle that would create a marker file when unpickled is fed to
  every reader under every file name a user might give it: each answers
  with a GyrometerError and the marker never appears.
* The recipe and session readers accept only their schema: unknown
  sections, unknown keys (in every section, in ``[[slits.slit]]`` and in
  the session table) and values of the wrong type are refused with the
  dotted key named.
"""

from __future__ import annotations

import ast
import pickle
from pathlib import Path

import pytest

import gyrometer.core as core_package
from gyrometer.core.errors import GyrometerError, RecipeError, SessionError

CORE = Path(core_package.__file__).resolve().parent
MODULES = sorted(CORE.glob("*.py"))

_FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__", "execfile", "input"}
_FORBIDDEN_ATTRS = {
    ("pickle", "load"), ("pickle", "loads"), ("pickle", "Unpickler"),
    ("cPickle", "load"), ("cPickle", "loads"), ("marshal", "load"),
    ("marshal", "loads"), ("shelve", "open"), ("dill", "load"),
    ("dill", "loads"), ("joblib", "load"), ("importlib", "import_module"),
    ("os", "system"), ("os", "popen"), ("runpy", "run_path"),
    ("runpy", "run_module"), ("jsonpickle", "decode"),
}
_FORBIDDEN_MODULES = {"pickle", "cPickle", "marshal", "shelve", "dill",
                      "jsonpickle", "subprocess", "runpy"}


def _dotted(node: ast.AST) -> tuple[str, ...]:
    parts = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if isinstance(node, ast.Name):
        parts.append(node.id)
    return tuple(reversed(parts))


def _problems(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found = []
    for node in ast.walk(tree):
        where = f"{path.name}:{getattr(node, 'lineno', '?')}"
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in _FORBIDDEN_MODULES:
                    found.append(f"{where}: import {alias.name}")
        elif isinstance(node, ast.ImportFrom):
            if (node.module or "").split(".")[0] in _FORBIDDEN_MODULES:
                found.append(f"{where}: from {node.module} import ...")
        elif isinstance(node, ast.Call):
            name = _dotted(node.func)
            if len(name) == 1 and name[0] in _FORBIDDEN_CALLS:
                found.append(f"{where}: {name[0]}()")
            if len(name) >= 2 and tuple(name[-2:]) in _FORBIDDEN_ATTRS:
                found.append(f"{where}: {'.'.join(name)}()")
            if name[-1:] == ("load",) and name[:1] == ("yaml",):
                loader = [k for k in node.keywords if k.arg == "Loader"]
                if not loader or "Safe" not in ast.unparse(loader[0].value):
                    found.append(f"{where}: yaml.load without SafeLoader")
            if name[-1:] in (("unsafe_load",), ("full_load",)):
                found.append(f"{where}: {'.'.join(name)}()")
            for kw in node.keywords:
                if kw.arg == "allow_pickle" and not (
                        isinstance(kw.value, ast.Constant) and kw.value.value is False):
                    found.append(f"{where}: allow_pickle={ast.unparse(kw.value)}")
                if kw.arg == "shell" and not (
                        isinstance(kw.value, ast.Constant) and kw.value.value is False):
                    found.append(f"{where}: shell={ast.unparse(kw.value)}")
    return found


def test_core_has_modules_to_check():
    names = {p.name for p in MODULES}
    assert {"fitsio.py", "session.py", "recipe.py", "regionfiles.py",
            "rotation.py"} <= names


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.name)
def test_core_module_never_executes_or_unpickles_anything(path):
    assert _problems(path) == []


def test_static_check_catches_what_it_forbids(tmp_path):
    # the checker itself: each forbidden construct is reported
    bad = tmp_path / "bad.py"
    bad.write_text(
        "import pickle\nimport yaml\nimport numpy as np\n"
        "x = eval(text)\nexec(code)\npickle.loads(b)\n"
        "yaml.load(s)\nyaml.load(s, Loader=yaml.SafeLoader)\n"
        "np.load(f, allow_pickle=True)\nnp.load(f, allow_pickle=False)\n",
        encoding="utf-8")
    found = _problems(bad)
    assert any("import pickle" in f for f in found)
    assert any("eval()" in f for f in found)
    assert any("exec()" in f for f in found)
    assert any("pickle.loads()" in f for f in found)
    assert sum("yaml.load without SafeLoader" in f for f in found) == 1
    assert sum("allow_pickle" in f for f in found) == 1


# -- a hostile pickle -------------------------------------------------------------
class _Touch:
    """Unpickling this calls ``Path.touch(marker)``."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


def _readers(tmp_path: Path):
    from gyrometer.core.fitsio import load_cube, load_mapset, open_data
    from gyrometer.core.geometry import DiskGeometry
    from gyrometer.core.recipe import load_any, load_recipe
    from gyrometer.core.regionfiles import read_slit_regions
    from gyrometer.core.rotation import load_rotation_curve
    from gyrometer.core.session import load_session

    geometry = DiskGeometry(150.0, 2.0, 0.0, 45.0)
    return [
        ("cube.fits", load_cube), ("maps.fits", load_mapset),
        ("data.fits", open_data), ("recipe.toml", load_recipe),
        ("any.toml", load_any), ("run.session.toml", load_session),
        ("slits.reg", lambda p: read_slit_regions(p, geometry)),
        ("slits.crtf", lambda p: read_slit_regions(p, geometry)),
        ("curve.ecsv", load_rotation_curve), ("curve.txt", load_rotation_curve),
        ("state.pkl", load_session),
    ]


def test_hostile_pickle_is_never_unpickled(tmp_path):
    marker = tmp_path / "unpickled-marker"
    payload = pickle.dumps(_Touch(marker))
    # the payload works: loading it *would* create the marker
    probe = tmp_path / "probe-marker"
    pickle.loads(pickle.dumps(_Touch(probe)))
    assert probe.exists()
    for name, reader in _readers(tmp_path):
        path = tmp_path / name
        path.write_bytes(payload)
        with pytest.raises(GyrometerError):
            reader(path)
        assert not marker.exists(), f"{name} was unpickled"


def test_yaml_tags_in_an_ecsv_header_are_not_executed(tmp_path):
    # ECSV headers are YAML; a python/object tag must not be constructed
    from gyrometer.core.rotation import load_rotation_curve

    marker = tmp_path / "yaml-marker"
    path = tmp_path / "curve.ecsv"
    path.write_text(
        "# %ECSV 1.0\n# ---\n# datatype:\n"
        "# - {name: r, unit: arcsec, datatype: float64}\n"
        "# - {name: v, unit: km / s, datatype: float64}\n"
        "# - {name: v_err, unit: km / s, datatype: float64}\n"
        "# meta: !!python/object/apply:pathlib.Path.touch\n"
        f"#   - {marker}\n"
        "r v v_err\n1 50 5\n2 90 5\n3 120 5\n", encoding="utf-8")
    with pytest.raises(GyrometerError):
        load_rotation_curve(path)
    assert not marker.exists()


# -- readers accept only their schema ------------------------------------------------
def _recipe_doc(tmp_path: Path, extra: str = "", section_extra: dict | None = None,
                header: str = "") -> Path:
    maps = tmp_path / "maps.fits"
    maps.write_bytes(b"")
    sections = {
        "galaxy": 'name = "LBDP-999"',
        "input": f'kind = "maps"\nmaps = "{maps}"',
        "geometry": 'mode = "given"\nra_deg = 150.0\ndec_deg = 2.0\n'
                    'pa_deg = 10.0\ninc_deg = 45.0',
    }
    for name, line in (section_extra or {}).items():
        sections[name] = sections.get(name, "") + "\n" + line
    text = header + "\n".join(f"[{k}]\n{v}\n" for k, v in sections.items()) + extra
    path = tmp_path / ("s.session.toml" if header else "r.toml")
    path.write_text(text, encoding="utf-8")
    return path


def test_schema_reader_accepts_the_minimal_documents(tmp_path):
    from gyrometer.core.recipe import load_recipe
    from gyrometer.core.session import load_session

    assert load_recipe(_recipe_doc(tmp_path)).geometry.pa_deg == 10.0
    header = "[gyrometer-session]\nschema_version = 1\n"
    assert load_session(_recipe_doc(tmp_path, header=header)).geometry.inc_deg == 45.0


def _all_sections():
    from gyrometer.core.session import SCHEMA
    return list(SCHEMA)


@pytest.mark.parametrize("section", _all_sections())
@pytest.mark.parametrize("session", [False, True], ids=["recipe", "session"])
def test_unknown_key_in_any_section_is_refused(tmp_path, section, session):
    from gyrometer.core.recipe import load_recipe
    from gyrometer.core.session import load_session

    header = "[gyrometer-session]\nschema_version = 1\n" if session else ""
    path = _recipe_doc(tmp_path, section_extra={section: "__class__ = 1"},
                       header=header)
    error = SessionError if session else RecipeError
    with pytest.raises(error, match=rf"{section}\.__class__.*unknown key"):
        (load_session if session else load_recipe)(path)


@pytest.mark.parametrize("text, key", [
    ("[python]\nobject = 'os.system'\n", "python: unknown section"),
    ("[[slits.slit]]\noffset_arcsec = 1.0\nwidth_arcsec = 1.0\n"
     "half_length_arcsec = 5.0\ncommand = 'rm'\n", r"slits.slit\[1\].command"),
    ("[[slits.slit]]\noffset_arcsec = 'x'\nwidth_arcsec = 1.0\n"
     "half_length_arcsec = 5.0\n", r"slits.slit\[1\].offset_arcsec"),
    ("[output]\ntables = [1, 2]\n", "output.tables: must be a list of strings"),
    ("[uncertainty]\nseed = 1.5\n", "uncertainty.seed: must be an integer"),
    ("[bar]\non_sky = 'yes'\n", "bar.on_sky: must be true or false"),
])
def test_wrong_structure_or_type_is_refused(tmp_path, text, key):
    from gyrometer.core.recipe import load_recipe

    with pytest.raises(RecipeError, match=key):
        load_recipe(_recipe_doc(tmp_path, extra="\n" + text), check_files=False)


def test_session_table_accepts_only_its_keys(tmp_path):
    from gyrometer.core.session import load_session

    header = "[gyrometer-session]\nschema_version = 1\nloader = 'pickle'\n"
    with pytest.raises(SessionError, match="gyrometer-session.loader.*unknown key"):
        load_session(_recipe_doc(tmp_path, header=header))
