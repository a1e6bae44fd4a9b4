"""Recipe files: validation messages name the key; the starter recipe."""

import sys

import pytest

from gyrometer.core.errors import RecipeError
from gyrometer.core.recipe import (check_recipe, load_any, load_recipe,
                                   starter_recipe)
from gyrometer.core.session import SCHEMA

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

GOOD = """
[galaxy]
name = "LBDP-037"
tracer = "stars"

[input]
kind = "maps"
maps = "maps.fits"

[geometry]
mode = "given"
ra_deg = 36.2764
dec_deg = -4.9031
pa_deg = 118.0
inc_deg = 38
vsys_kms = 2630.0
distance_mpc = 30.0
pa_err_deg = 3.0

[slits]
count = 7
spacing_arcsec = 1.0

[uncertainty]
draws = 200
seed = 37
terms = ["noise", "position angle"]

[bar]
length_arcsec = 12.85
on_sky = true
pa_deg = 64.2
"""


def _write(tmp_path, text, name="r.toml"):
    (tmp_path / "maps.fits").write_bytes(b"")  # existence is all that is checked
    path = tmp_path / name
    path.write_text(text)
    return path


def test_a_good_recipe_becomes_a_session(tmp_path):
    session = load_recipe(_write(tmp_path, GOOD))
    assert session.name == "LBDP-037"
    assert session.input.maps == str(tmp_path / "maps.fits")  # relative to the recipe
    assert session.geometry.inc_deg == 38.0 and session.geometry.pa_err_deg == 3.0
    assert session.slit_rule.count == 7 and session.slits is None
    assert session.budget.n_draws == 200 and session.budget.seed == 37
    assert session.budget.noise and session.budget.position_angle
    assert not session.budget.bootstrap and not session.budget.centre
    assert session.bar.on_sky and session.bar.pa_deg == 64.2
    assert session.output.folder == str(tmp_path / "gyrometer-output")


@pytest.mark.parametrize("old, new, key, words", [
    ("pa_deg = 118.0", 'pa_deg = "118"', "geometry.pa_deg", "must be a number, not a string"),
    ("count = 7", "count = 7.5", "slits.count", "must be an integer"),
    ("count = 7", "count = -1", "slits.count", "must not be negative"),
    ("on_sky = true", 'on_sky = "yes"', "bar.on_sky", "true or false"),
    ('tracer = "stars"', 'tracer = "star"', "galaxy.tracer", "did you mean 'stars'"),
    ('terms = ["noise", "position angle"]', 'terms = ["noise", "PA"]',
     "uncertainty.terms", "unknown entry 'PA'"),
    ("inc_deg = 38", "inc_deg = 95", "geometry.inc_deg", "strictly between 0 and 90"),
    ("draws = 200", "draws = 5", "uncertainty.draws", "at least 10"),
])
def test_wrong_values_are_reported_with_their_key(tmp_path, old, new, key, words):
    path = _write(tmp_path, GOOD.replace(old, new))
    with pytest.raises(RecipeError) as info:
        load_recipe(path)
    assert info.value.keyword == key
    assert words in str(info.value)
    assert str(path) in str(info.value) and key in str(info.value)


def test_unknown_keys_get_a_suggestion(tmp_path):
    path = _write(tmp_path, GOOD.replace("spacing_arcsec", "spacing_arcsc"))
    with pytest.raises(RecipeError, match="did you mean 'spacing_arcsec'") as info:
        load_recipe(path)
    assert info.value.keyword == "slits.spacing_arcsc"


def test_unknown_sections_get_a_suggestion(tmp_path):
    path = _write(tmp_path, GOOD + '\n[outptu]\nfolder = "x"\n')
    with pytest.raises(RecipeError, match="did you mean 'output'") as info:
        load_recipe(path)
    assert info.value.keyword == "outptu"


def test_missing_input_files_are_named(tmp_path):
    path = _write(tmp_path, GOOD.replace('maps = "maps.fits"',
                                         'maps = "nowhere.fits"'))
    with pytest.raises(RecipeError, match="nowhere.fits") as info:
        load_recipe(path)
    assert info.value.keyword == "input.maps"
    # the same recipe can still be read without checking files
    assert load_recipe(path, check_files=False).input.maps.endswith("nowhere.fits")


def test_maps_route_needs_a_velocity_map(tmp_path):
    text = GOOD.replace('maps = "maps.fits"', 'intensity = "maps.fits"')
    with pytest.raises(RecipeError) as info:
        load_recipe(_write(tmp_path, text))
    assert info.value.keyword == "input.velocity"


def test_given_geometry_needs_every_angle(tmp_path):
    text = GOOD.replace("pa_deg = 118.0\n", "")
    with pytest.raises(RecipeError, match="needed when geometry.mode") as info:
        load_recipe(_write(tmp_path, text))
    assert info.value.keyword == "geometry.pa_deg"


def test_invalid_toml_is_reported_with_the_file(tmp_path):
    path = _write(tmp_path, GOOD + "\nthis is not toml\n")
    with pytest.raises(RecipeError, match="not valid TOML"):
        load_recipe(path)


def test_check_describes_what_will_run(tmp_path):
    session, lines = check_recipe(_write(tmp_path, GOOD))
    text = "\n".join(lines)
    assert "PA = 118 deg" in text and "7 slits" in text
    assert "200 draws per source, seed 37" in text


def test_load_any_reads_sessions_and_recipes(tmp_path):
    from gyrometer.core.session import save_session

    session = load_recipe(_write(tmp_path, GOOD))
    saved = save_session(session, tmp_path / "s.toml")
    assert load_any(saved) == session
    with pytest.raises(RecipeError, match="session file"):
        load_recipe(saved)


def test_starter_recipe_has_every_setting_and_loads(tmp_path):
    from gyrometer.core.fitsio import write_mapset
    from gyrometer.core.synthetic import barred_model, make_maps

    # a weak bar: the centre is then the brightest part of the disk
    maps, truth = make_maps(barred_model(name="LBDP-999", shape=(48, 48),
                                         pixel_scale_arcsec=1.0,
                                         psf_fwhm_arcsec=2.0,
                                         bar_amplitude=0.1))
    data = write_mapset(tmp_path / "data" / "m.fits", maps)
    text = starter_recipe(data, recipe_dir=tmp_path)
    doc = tomllib.loads(text)
    for section, specs in SCHEMA.items():
        assert section in doc
        for spec in specs:
            # each key is present, either set or as a commented example
            assert f"{spec.name} = " in text, (section, spec.name)
            assert f"# {spec.doc}" in text
    assert doc["input"]["maps"] == "data/m.fits"
    assert doc["galaxy"]["name"] == "LBDP-999"
    assert doc["slits"]["spacing_arcsec"] == 2.0  # the PSF FWHM
    assert doc["geometry"]["mode"] == "estimate"
    # the centre guess (intensity centroid) lies within a PSF of the truth
    from astropy.coordinates import SkyCoord
    guess = SkyCoord(doc["geometry"]["ra_deg"], doc["geometry"]["dec_deg"],
                     unit="deg")
    assert guess.separation(truth.geometry.center).arcsec < 2.0
    path = tmp_path / "starter.toml"
    path.write_text(text)
    session = load_recipe(path)
    assert session.geometry is None
    assert session.input.maps == str(data.resolve())


@pytest.mark.parametrize("section, text, keyword", [
    ("radial", 'lam = "strong"', "radial.lam"),
    ("radial", "edges_arcsec = [10.0, 5.0]", "radial.edges_arcsec"),
    ("radial", 'regularisation = "smooth"', "radial.regularisation"),
    ("stellar", "n_hermite = 3", "stellar.n_hermite"),
    ("stellar", "fit_window_A = [8500.0]", "stellar.fit_window_A"),
    ("stellar", "mask_ranges_A = [8500.0, 8510.0]", "stellar.mask_ranges_A"),
    ("stellar", "geometry_draws = 1", "stellar.geometry_draws"),
])
def test_bad_radial_and_stellar_settings_name_the_key(tmp_path, section,
                                                      text, keyword):
    path = _write(tmp_path, GOOD + f"\n[{section}]\n{text}\n")
    with pytest.raises(RecipeError) as info:
        load_recipe(path)
    assert info.value.keyword == keyword
    assert "r.toml" in str(info.value)


def test_radial_and_stellar_sections_are_read(tmp_path):
    path = _write(tmp_path, GOOD + """
[radial]
enabled = true
edges_arcsec = [0.0, 10.0, 20.0]
lam = 0.5
n_mc = 20

[stellar]
fit_window_A = [8450.0, 8850.0]
mask_ranges_A = [[8600.0, 8610.0]]
template = "tpl.fits"
geometry_draws = 10
""")
    session = load_recipe(path)
    assert session.radial.edges_arcsec == (0.0, 10.0, 20.0)
    assert session.radial.lam == 0.5 and session.radial.n_mc == 20
    st = session.absorption.stellar
    assert st.fit_window_A == (8450.0, 8850.0)
    assert st.mask_ranges_A == ((8600.0, 8610.0),)
    assert st.template == str(tmp_path.resolve() / "tpl.fits")
    assert session.absorption.geometry_draws == 10
    # the section is off unless enabled
    off = load_recipe(_write(tmp_path, GOOD + "\n[radial]\nn_mc = 5\n", "o.toml"))
    assert off.radial is None


def test_starter_recipe_takes_the_tracer_from_the_cube_rest_value():
    """RESTFRQ of the HI sample (1420.405751768 MHz, HI 21 cm; core.lines)
    and the H-alpha sample's line make the starter name the right tracer."""
    from pathlib import Path

    from gyrometer.core.recipe import starter_recipe

    samples = Path(__file__).resolve().parents[2] / "sample_cubes"
    hi = starter_recipe(samples / "LBDP-023_hi_cube.fits")
    assert 'tracer = "HI"' in hi
    halpha = starter_recipe(samples / "LBDP-011_halpha_cube.fits")
    assert 'tracer = "ionised gas"' in halpha
