"""Session files: TOML round trip, schema versions, migration."""

import sys

import pytest

from gyrometer.core.errors import OutputError, SessionError
from gyrometer.core.geometry import DiskGeometry
from gyrometer.core.session import (SESSION_SCHEMA_VERSION, BarSettings,
                                    BudgetSettings, InputSpec, OutputSettings,
                                    Session,
                                    load_session, save_session,
                                    session_to_toml)
from gyrometer.core.slits import Slit, SlitSet

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


def _session(tmp_path):
    return Session(
        name="LBDP-011", tracer="stars",
        input=InputSpec(kind="maps", maps=str(tmp_path / "maps.fits"),
                        sha256=(("maps", "0f" * 32),)),
        geometry=DiskGeometry(ra_deg=150.1234, dec_deg=-12.3456, pa_deg=30.1,
                              inc_deg=50.0, vsys_kms=2000.0,
                              distance_mpc=20.0, pa_err_deg=2.0,
                              inc_err_deg=3.0, source="recipe"),
        slits=SlitSet((Slit(-3.3, 1.1, 20.0), Slit(0.1 + 0.2, 1.1, 20.0),
                       Slit(3.3, 1.1, 18.5, x_center_arcsec=-0.25)),
                      symmetric=True),
        budget=BudgetSettings(n_draws=150, seed=42, bootstrap=False,
                              position_angle=False, inclination=False),
        bar=BarSettings(length_arcsec=12.5, length_err_arcsec=1.0,
                        pa_deg=None),
        output=OutputSettings(folder=str(tmp_path / "out"), figures=("svg",)))


def test_session_round_trips_exactly_through_toml(tmp_path):
    session = _session(tmp_path)
    path = save_session(session, tmp_path / "s.gyrometer.toml")
    back = load_session(path)
    assert back == session
    # 0.1 + 0.2 is not 0.3: shortest repr keeps the exact float
    assert back.slits.slits[1].offset_arcsec == 0.1 + 0.2


def test_session_file_is_plain_toml_with_a_schema_version(tmp_path):
    text = session_to_toml(_session(tmp_path))
    doc = tomllib.loads(text)
    assert doc["gyrometer-session"]["schema_version"] == SESSION_SCHEMA_VERSION
    assert doc["uncertainty"]["seed"] == 42
    assert doc["input"]["sha256"]["maps"] == "0f" * 32
    assert len(doc["slits"]["slit"]) == 3
    assert doc["bar"]["pa_deg"] == "estimate"


def test_estimated_geometry_keeps_the_given_distance(tmp_path):
    session = Session(geometry=None,
                      geometry_guess=(("distance_mpc", 18.0),
                                      ("pa_err_deg", 2.5)))
    back = Session.from_toml(session.to_toml(), base_dir=tmp_path)
    assert back.geometry is None
    assert dict(back.geometry_guess) == {"distance_mpc": 18.0,
                                         "pa_err_deg": 2.5}


def test_newer_schema_version_is_refused_with_a_clear_message(tmp_path):
    text = session_to_toml(_session(tmp_path)).replace(
        "schema_version = 1", "schema_version = 7")
    path = tmp_path / "new.toml"
    path.write_text(text)
    with pytest.raises(SessionError, match="version 7 is newer") as info:
        load_session(path)
    assert info.value.keyword == "gyrometer-session.schema_version"
    assert "new.toml" in str(info.value)


def test_version_0_session_is_migrated(tmp_path):
    text = """
[gyrometer-session]
schema_version = 0

[galaxy]
name = "LBDP-023"

[input]
kind = "maps"
maps = "m.fits"

[geometry]
mode = "given"
ra_deg = 10.0
dec_deg = 20.0
pa = 75.0
inc = 40.0

[budget]
n_draws = 300
seed = 9
"""
    path = tmp_path / "old.toml"
    path.write_text(text)
    session = load_session(path)
    assert session.geometry.pa_deg == 75.0
    assert session.geometry.inc_deg == 40.0
    assert session.budget.n_draws == 300 and session.budget.seed == 9
    assert session.input.maps == str(tmp_path / "m.fits")


def test_a_recipe_is_not_taken_for_a_session(tmp_path):
    path = tmp_path / "recipe.toml"
    path.write_text('[galaxy]\nname = "x"\n')
    with pytest.raises(SessionError, match="not a session file"):
        load_session(path)


def test_session_errors_name_the_key(tmp_path):
    text = session_to_toml(_session(tmp_path)).replace(
        "draws = 150", 'draws = "many"')
    with pytest.raises(SessionError) as info:
        Session.from_toml(text, source="x.toml")
    assert info.value.keyword == "uncertainty.draws"


def test_saving_never_overwrites_without_permission(tmp_path):
    path = save_session(_session(tmp_path), tmp_path / "s.toml")
    with pytest.raises(OutputError):
        save_session(Session(), path)
    assert load_session(path).name == "LBDP-011"
