"""Figures: valid PNG/PDF/SVG files with the expected content."""

import xml.etree.ElementTree as ET

import numpy as np
import pytest

from gyrometer.core.errors import OutputError
from gyrometer.core.figures import (convergence_figure, fit_figure,
                                    map_figure, pa_figure, rotation_figure,
                                    save_figure)


@pytest.fixture(scope="module")
def scene():
    import warnings

    from gyrometer.core.diagnostics import convergence, pa_sensitivity
    from gyrometer.core.rcmodels import fit_curve_models
    from gyrometer.core.resonances import resonance_budget
    from gyrometer.core.rotation import RotationCurve
    from gyrometer.core.slits import SlitSet
    from gyrometer.core.synthetic import barred_model, make_maps
    from gyrometer.core.tw import measure

    maps, truth = make_maps(barred_model(name="LBDP-902", shape=(64, 64),
                                         pixel_scale_arcsec=1.0,
                                         psf_fwhm_arcsec=1.5))
    geometry = truth.geometry.with_(pa_err_deg=2.0)
    slits = SlitSet.generate(5, 3.0, 2.0, 18.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # diagnostics of a tiny test map
        m = measure(maps, geometry, slits, warn=False)
        conv = convergence(maps, geometry, slits)
    pa = pa_sensitivity(maps, geometry, slits, np.arange(-4.0, 5.0, 2.0))
    r_arcsec = truth.r_kpc[1::10] / truth.kpc_per_arcsec
    keep = (r_arcsec > 1.0) & (r_arcsec < 60.0)
    curve = RotationCurve(r_arcsec[keep], truth.vc_kms[1::10][keep],
                          np.full(keep.sum(), 3.0), distance_mpc=20.0)
    fit = fit_curve_models(curve, models=("arctan",))[0]
    om = truth.omega_p_kms_arcsec[0]
    import astropy.units as u
    res = resonance_budget(fit, om * u.km / u.s / u.arcsec,
                           rng=np.random.default_rng(1),
                           n_draws=20, vary_curve=False, distance_mpc=20.0)
    return dict(maps=maps, geometry=geometry, slits=slits, m=m, conv=conv,
                pa=pa, fit=fit, res=res, om=om, truth=truth)


def _check_file(path, fmt):
    data = path.read_bytes()
    if fmt == "png":
        assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec 5.2)
    elif fmt == "pdf":
        assert data[:5] == b"%PDF-" and b"%%EOF" in data[-32:]  # ISO 32000
    else:
        root = ET.fromstring(data)
        assert root.tag.endswith("svg")


def test_every_figure_is_a_valid_file(tmp_path, scene):
    s = scene
    figures = {
        "map": map_figure(s["maps"], s["geometry"], s["slits"]),
        "fit": fit_figure(s["m"]),
        "convergence": convergence_figure(s["conv"], geometry=s["geometry"]),
        "pa": pa_figure(s["pa"], geometry=s["geometry"]),
        "rotation": rotation_figure(s["fit"], omega_p=(0.9 * s["om"], s["om"],
                                                       1.1 * s["om"]),
                                    resonances=s["res"],
                                    bar_length_arcsec=30.0, distance_mpc=20.0),
    }
    # every figure in one format and every format at least once (speed)
    formats = {"map": "pdf", "fit": "svg", "convergence": "png", "pa": "pdf",
               "rotation": "svg"}
    for name, fig in figures.items():
        fmt = formats[name]
        path = save_figure(fig, tmp_path / f"{name}.{fmt}")
        _check_file(path, fmt)


def test_png_is_written_at_200_dpi(tmp_path, scene):
    from PIL import Image  # matplotlib depends on Pillow

    fig = fit_figure(scene["m"])
    path = save_figure(fig, tmp_path / "fit.png")
    width_in = fig.get_size_inches()[0]
    with Image.open(path) as img:
        assert img.size[0] == pytest.approx(200 * width_in, abs=2)


def test_vector_files_are_reproducible(tmp_path, scene):
    fig = fit_figure(scene["m"])
    a = save_figure(fig, tmp_path / "a.svg").read_bytes()
    b = save_figure(fig, tmp_path / "b.svg").read_bytes()
    assert a == b


def test_map_figure_draws_every_slit_on_both_panels(scene):
    fig = map_figure(scene["maps"], scene["geometry"], scene["slits"])
    image_axes = [ax for ax in fig.axes if ax.images]
    assert len(image_axes) == 2
    for ax in image_axes:
        assert len(ax.patches) == len(scene["slits"])
        # line of nodes: receding (solid) and approaching (dashed) halves + centre
        assert len(ax.lines) == 3


def test_fit_figure_has_points_line_and_band(scene):
    fig = fit_figure(scene["m"])
    (ax,) = fig.axes
    assert len(ax.collections) >= 1  # the 1-sigma band
    slope_line = ax.lines[0]
    x, y = slope_line.get_data()
    fit = scene["m"].fit
    np.testing.assert_allclose(y, fit.slope * x + fit.intercept)


def test_rotation_figure_shows_frequencies_and_resonances(scene):
    fig = rotation_figure(scene["fit"], omega_p=(0.9 * scene["om"], scene["om"],
                                                 1.1 * scene["om"]),
                          resonances=scene["res"], distance_mpc=20.0)
    top, bottom = fig.axes[:2]
    labels = [line.get_label() for line in bottom.lines]
    for needed in (r"$\Omega$", r"$\Omega\pm\kappa/2$", r"$\Omega\pm\kappa/4$",
                   r"$\Omega_p$"):
        assert needed in labels
    found = [r for r in scene["res"].rows if np.isfinite(r.radius_arcsec)]
    # one dotted vertical line per resonance radius on each panel
    assert sum(1 for line in bottom.lines if line.get_linestyle() == ":") == len(found)
    # corotation: Omega crosses the pattern speed there (Omega in km/s/kpc)
    cr = scene["res"].row("CR").radius_arcsec
    scale = 20.0 * 1e3 / 206264.80624709636  # kpc per arcsec at 20 Mpc
    omega = bottom.lines[0]
    x, y = omega.get_data()
    assert np.interp(cr * scale, x, y) == pytest.approx(scene["om"] / scale,
                                                        rel=1e-3)


def test_convergence_and_pa_figures_have_their_panels(scene):
    fig = convergence_figure(scene["conv"])
    assert len(fig.axes) == 3
    assert len(fig.axes[0].lines) == len(scene["slits"])
    fig = pa_figure(scene["pa"], geometry=scene["geometry"])
    line = [ln for ln in fig.axes[0].lines if ln.get_marker() == "o"][0]
    np.testing.assert_allclose(line.get_data()[0], [-4, -2, 0, 2, 4])


def test_unknown_format_and_existing_files_are_refused(tmp_path, scene):
    fig = fit_figure(scene["m"])
    with pytest.raises(OutputError, match="unknown figure format"):
        save_figure(fig, tmp_path / "fit.jpg")
    save_figure(fig, tmp_path / "fit.pdf")
    with pytest.raises(OutputError, match="exists"):
        save_figure(fig, tmp_path / "fit.pdf")


def test_radial_figure_draws_the_steps_over_omega_and_lindblad_curves(scene):
    from gyrometer.core.figures import radial_figure
    from gyrometer.core.radial import RadialSettings, measure_radial

    radial = measure_radial(scene["maps"], scene["geometry"], scene["slits"],
                            RadialSettings(n_annuli=3), warn=False)
    fig = radial_figure(radial, curve_fit=scene["fit"],
                        omega_p=(0.9 * scene["om"], scene["om"],
                                 1.1 * scene["om"]))
    ax = fig.axes[0]
    labels = [line.get_label() for line in ax.lines]
    for needed in (r"$\Omega$", r"$\Omega\pm\kappa/2$", r"$\Omega_p(R)$",
                   r"single $\Omega_p$"):
        assert needed in labels
    step = ax.lines[labels.index(r"$\Omega_p(R)$")]
    x, y = step.get_data()
    # one flat segment per annulus at its value, in km/s/kpc (D = 20 Mpc)
    scale = 20.0 * 1e3 / 206264.80624709636  # kpc per arcsec at 20 Mpc
    np.testing.assert_allclose(y[::2], radial.omega_kms_arcsec / scale)
    np.testing.assert_allclose(x[-1], radial.edges_arcsec[-1] * scale)
    # Omega is V/R of the model (Binney & Tremaine 2008, section 3.2.3)
    omega = ax.lines[labels.index(r"$\Omega$")]
    xo, yo = omega.get_data()
    r_arcsec = xo[200] / scale
    assert yo[200] == pytest.approx(float(scene["fit"].v(r_arcsec)) / r_arcsec
                                    / scale, rel=1e-9)
    # without a model only the steps (and no frequency curves) are drawn
    bare = radial_figure(radial)
    assert [ln.get_label() for ln in bare.axes[0].lines] == [r"$\Omega_p(R)$"]
