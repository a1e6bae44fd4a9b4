"""The pipeline with [radial] enabled: Omega_p(R) from a recipe to the tables.

Reference values: the true pattern speeds of the exact-continuity two-pattern
disk of gyrometer.core.synthetic (DOMAIN.md section 1, "A second exact
construction", derived), recovered by the radial method of Merrifield, Rand
& Meidt (2006, MNRAS 366, L17); the tolerance (10 %, noiseless) is the one
asked for in the issue "Pattern speed against radius".
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy.table import Table

from gyrometer.core.pipeline import export_result, run_session
from gyrometer.core.recipe import load_recipe
from gyrometer.core.session import Session, load_session, save_session
from gyrometer.core.synthetic import make_maps, two_pattern_model

RECIPE = """
[galaxy]
name = "LBDP-902"
tracer = "stars"

[input]
kind = "maps"
maps = "two.fits"

[geometry]
mode = "given"
ra_deg = {ra}
dec_deg = {dec}
pa_deg = {pa}
inc_deg = {inc}
vsys_kms = {vsys}
distance_mpc = {dist}

[slits]
count = 21
spacing_arcsec = {spacing}
width_arcsec = {spacing}
half_length_arcsec = {half}

[uncertainty]
draws = 10
seed = 7
terms = ["slit bootstrap"]

[rotation_curve]
source = "none"

[bar]
length_arcsec = 0

[radial]
enabled = true
lam = "gcv"

[output]
folder = "out"
tables = ["ecsv", "json", "tex"]
figures = ["png"]
figure_kinds = ["radial"]
regions = "none"
session = true
"""


@pytest.fixture(scope="module")
def radial_run(tmp_path_factory):
    from gyrometer.core.fitsio import write_mapset

    tmp = tmp_path_factory.mktemp("radial")
    # bar at 50 km/s/kpc inside 3.5 kpc, spiral at 22 km/s/kpc in 4.5-11 kpc
    # (the defaults of two_pattern_model), noiseless
    model = two_pattern_model(name="LBDP-902", shape=(128, 128),
                              pixel_scale_arcsec=1.4, wcs_rotation_deg=20.0)
    maps, truth = make_maps(model, noise=False)
    write_mapset(tmp / "two.fits", maps)
    g = truth.geometry
    half = 0.5 * model.shape[0] * model.pixel_scale_arcsec * 0.98
    spacing = 2.0 * half * g.cos_i * 0.9 / 21   # adjacent slits, 90 % of the minor axis
    (tmp / "two.toml").write_text(RECIPE.format(
        ra=g.ra_deg, dec=g.dec_deg, pa=g.pa_deg, inc=g.inc_deg,
        vsys=g.vsys_kms, dist=g.distance_mpc, spacing=round(spacing, 4),
        half=round(0.95 * half, 3)))
    session = load_recipe(tmp / "two.toml")
    result = run_session(session)
    paths = export_result(result)
    return tmp, model, truth, session, result, paths


def _plateau(centres, truth, model, k):
    """Annuli whose centres lie where pattern k has its full amplitude."""
    lo, hi = truth.zones_arcsec[k]
    taper = model.patterns[k].taper / truth.kpc_per_arcsec
    return (centres > lo + taper) & (centres < hi - taper)


def test_both_pattern_speeds_appear_in_the_radial_table(radial_run):
    tmp, model, truth, session, result, paths = radial_run
    assert result.radial is not None
    table = Table.read(paths["radial.ecsv"], format="ascii.ecsv")
    assert table.meta["galaxy"] == "LBDP-902" and table.meta["route"] == "maps"
    centres = np.asarray(table["r_mid"])
    omega = np.asarray(table["Omega_p_kpc"])
    assert str(table["Omega_p_kpc"].unit) == "km / (kpc s)"
    for k, true in enumerate(truth.omega_p_kms_kpc):
        zone = _plateau(centres, truth, model, k)
        assert zone.any()
        # exact two-pattern disk (DOMAIN.md section 1, derived); 10 % (issue)
        np.testing.assert_allclose(omega[zone], true, rtol=0.10)


def test_radial_values_are_in_the_json_and_the_figure_is_written(radial_run):
    tmp, model, truth, session, result, paths = radial_run
    doc = json.loads(paths["table.json"].read_text())
    assert doc["schema_version"] == 1          # keys were only added
    radial = doc["meta"]["details"]["radial"]
    assert len(radial["omega_p_kms_kpc"]) == result.radial.n_annuli
    assert len(radial["edges_arcsec"]) == result.radial.n_annuli + 1
    assert doc["rows"][0]["route"] == "maps"
    assert paths["figure.radial.png"].stat().st_size > 10_000
    assert "Route" in paths["table.tex"].read_text()


def test_saved_session_keeps_the_radial_section(radial_run, tmp_path):
    tmp, model, truth, session, result, paths = radial_run
    saved = load_session(paths["session"])
    assert saved.radial == result.session.radial
    assert saved.radial is not None and saved.radial.lam == "gcv"
    # and a changed section survives a write/read round trip
    changed = saved.with_(radial=saved.radial.__class__(n_annuli=6, lam=0.3,
                                                        fit_vsys_offset=True))
    path = save_session(changed, tmp_path / "s.toml")
    back = load_session(path)
    assert back.radial == changed.radial
    assert Session().radial is None    # disabled by default


def test_cli_summary_lists_every_annulus(radial_run):
    from gyrometer.core.cli import format_summary

    tmp, model, truth, session, result, paths = radial_run
    text = format_summary(result, paths)
    assert f"Omega_p(R)      {result.radial.n_annuli} annuli" in text
    assert text.count("km/s/kpc") >= 1
    rows = [ln for ln in text.splitlines() if " - " in ln and "±" in ln]
    assert len(rows) == result.radial.n_annuli



def test_radial_monte_carlo_depends_only_on_the_session_seed(radial_run):
    """run_session's Omega_p(R) Monte Carlo equals measure_radial driven by
    pipeline.radial_rng(seed), the generator the app's radial button uses, so
    one session gives the same radial errors in the app and in batch output."""
    from dataclasses import replace

    from gyrometer.core.pipeline import radial_rng
    from gyrometer.core.radial import measure_radial

    tmp, model, truth, session, result, paths = radial_run
    settings = replace(session.radial, n_mc=12)
    batch = run_session(replace(session, radial=settings)).radial
    resolved = result.session
    direct = measure_radial(result.maps, resolved.geometry, resolved.slits,
                            settings, rng=radial_rng(session.budget.seed),
                            warn=False)
    assert batch.mc_draws_kms_arcsec is not None
    np.testing.assert_array_equal(batch.mc_draws_kms_arcsec,
                                  direct.mc_draws_kms_arcsec)
    np.testing.assert_array_equal(batch.omega_err_kms_arcsec,
                                  direct.omega_err_kms_arcsec)
