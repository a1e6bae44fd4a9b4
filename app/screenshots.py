"""Save PNG pictures of the main views: ``python -m gyrometer.app.screenshots OUTDIR``.

Opens the synthetic sample galaxy LBDP-037, sets its distance (30 Mpc, from
the sample's truth file), runs the full measurement and grabs the window:
the map with slits and the live fit, the rotation curve and resonances, the
uncertainty budget, the cube's moment-map dialog and the method notes. Use a
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
        if errors:
            print("errors shown:", *errors, sep="\n  ", file=sys.stderr)
        window.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
