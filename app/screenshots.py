"""Save PNG pictures of the main views: ``python -m gyrometer.app.screenshots OUTDIR``.

Opens the synthetic sample galaxy LBDP-037, sets its distance (30 Mpc, from
the sample's truth file), runs the full measurement and grabs the window:
the map with slits and the live fit, the rotation curve and resonances, the
uncertainty budget, the pattern speed against radius, the cube's moment-map
dialog and the method notes; then a small synthetic absorption-line cube
(made on the fly, not shipped) measured through its slit spectra. Use a
real X server for faithful fonts::

    xvfb-run -a -s "-screen 0 1400x900x24" env QT_QPA_PLATFORM=xcb \\
        python -m gyrometer.app.screenshots docs/screenshots
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time
from pathlib import Path

__all__ = ["main"]


def _wait(app, controller, timeout_s: float = 300.0) -> None:
    start = time.time()
    while controller.tasks.busy and time.time() - start < timeout_s:
        app.processEvents()
        time.sleep(0.01)
    for _ in range(10):
        app.processEvents()


def _save(widget, path: Path) -> None:
    """Grab ``widget`` and write a small PNG (256-colour palette, which keeps
    screenshots for the README well under 300 KB)."""
    widget.grab().save(str(path), "PNG")
    try:
        from PIL import Image
    except ImportError:  # pillow comes with matplotlib; keep the full PNG
        pass
    else:
        with Image.open(path) as image:
            small = image.convert("RGB").quantize(
                256, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE)
        small.save(path, optimize=True)
    print(f"wrote {path} ({path.stat().st_size // 1024} KB)")


def _absorption_shot(app, window, folder: Path, out: Path) -> None:
    """Measure a small synthetic absorption-line cube through its slit
    spectra and grab the window with the slit-spectrum panel."""
    import numpy as np

    from gyrometer.core.fitsio import open_data, write_cube
    from gyrometer.core.slits import SlitSet
    from gyrometer.core.stellar import StellarSettings
    from gyrometer.core.synthetic import barred_model
    from gyrometer.core.synthetic_stellar import make_absorption_cube

    from .controller import Controller

    model = barred_model(name="LBDP-037", shape=(40, 40), pixel_scale_arcsec=2.5,
                         dispersion_kms=80.0, noise_frac=0.02)
    cube, truth, scene = make_absorption_cube(model, rng=np.random.default_rng(37))
    path = folder / "LBDP-037_stellar_cube.fits"
    write_cube(path, cube)
    c = window.controller
    c.cube = open_data(path)
    c.source_path = str(path)
    c.pending_session = Controller._session_for(path, c.cube)
    c.stellar_settings = StellarSettings(n_mc=8, continuum_band_A=scene.continuum_band_A)
    c.open_absorption(truth.geometry.vsys_kms)
    _wait(app, c)
    c.set_geometry(truth.geometry, "geometry of the model")
    c.set_slits(SlitSet.generate(6, 7.0, 6.0, 48.0), "six slits")
    c.run_absorption()
    _wait(app, c)
    c.select_slit(4)
    window.centralWidget().setSizes([430, 700])   # room for the spectra
    window.tabs.setCurrentWidget(window.spectrum_frame)
    _wait(app, c)
    _save(window, out / "slit-spectra.png")


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if len(argv) != 1:
        print(__doc__.strip().splitlines()[0], file=sys.stderr)
        return 2
    out = Path(argv[0])
    out.mkdir(parents=True, exist_ok=True)
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

    from .controller import sample_path
    from .dialogs import MomentDialog
    from .main import create_app
    from .settings import AppSettings

    sample = sample_path()
    if sample is None:
        print("sample_cubes/LBDP-037_stellar_maps.fits not found", file=sys.stderr)
        return 1
    truth = json.loads(sample.with_name("LBDP-037_truth.json").read_text())
    with tempfile.TemporaryDirectory() as cfg:
        app, window = create_app([], AppSettings(cfg))
        window.resize(1400, 880)
        window.show()
        c = window.controller
        errors: list[str] = []
        c.error_raised.connect(lambda title, msg: errors.append(f"{title}: {msg}"))
        c.open_path(sample)
        _wait(app, c)
        if c.maps is None:
            print("could not open the sample:", errors, file=sys.stderr)
            return 1
        c.update_geometry("set distance",
                          distance_mpc=float(truth["truth"]["geometry"]["distance_mpc"]))
        c.select_slit(4)
        _wait(app, c)
        _save(window, out / "main-window.png")

        c.run_full()
        _wait(app, c)
        window.map_view.set_kind("intensity")
        window.tabs.setCurrentIndex(1)
        _wait(app, c)
        _save(window, out / "rotation-and-resonances.png")

        window.tabs.setCurrentIndex(2)
        _wait(app, c)
        _save(window.tabs, out / "checks.png")

        window.map_view.set_kind("velocity")
        window.tabs.setCurrentIndex(0)
        _wait(app, c)
        _save(window.tabs, out / "pattern-speed-and-budget.png")

        window.tabs.setCurrentWidget(window.radial_frame)
        window.radial_view.lam.setCurrentText("0.1")
        window.radial_view.run()
        _wait(app, c)
        _save(window.tabs, out / "pattern-speed-against-radius.png")

        cube_path = sample.with_name("LBDP-011_halpha_cube.fits")
        if cube_path.is_file():
            from gyrometer.core.fitsio import open_data
            dialog = MomentDialog(open_data(cube_path), None, window)
            dialog.show()
            _wait(app, c)
            _save(dialog, out / "moment-maps-dialog.png")
            dialog.close()
        window.show_help()
        _wait(app, c)
        _save(window._help, out / "method-notes.png")
        window._help.close()
        _absorption_shot(app, window, Path(cfg), out)
        if errors:
            print("errors shown:", *errors, sep="\n  ", file=sys.stderr)
        window.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
