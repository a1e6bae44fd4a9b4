"""Live slit dragging: updates per second through the app's real path.

A 500 x 500 synthetic barred galaxy with 20 slits is loaded into the desktop
app (offscreen). One slit is dragged programmatically through the same code
as the mouse (``SlitItem.drag_by`` -> ``Controller.move_slit`` -> coalescing
timer -> ``gyrometer.core.tw.LiveMeasurer.update_slit`` -> signals -> map
outline, slit table and <V>-<X> plot redrawn). Two figures are printed:

* cost of one update (move, recompute, redraw, paint) when each move is
  processed before the next; its inverse is the sustainable update rate;
* a 2-second drag with mouse events every 8 ms (125 Hz, a fast mouse):
  how many recomputes the coalescing timer let through per second.

Goal (issue section 5): at least 20 updates per second.

Run: ``QT_QPA_PLATFORM=offscreen python benchmarks/bench_live.py``
"""

from __future__ import annotations

import os
import statistics
import sys
import tempfile
import time

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import numpy as np  # noqa: E402


def main() -> int:
    from gyrometer.app.main import create_app
    from gyrometer.app.settings import AppSettings
    from gyrometer.core.slits import SlitSet
    from gyrometer.core.synthetic import barred_model, make_maps

    t0 = time.perf_counter()
    model = barred_model(shape=(500, 500), pixel_scale_arcsec=0.2, subsample=1)
    maps, truth = make_maps(model, rng=np.random.default_rng(5))
    print(f"synthetic 500x500 maps made in {time.perf_counter() - t0:.1f} s; "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores "
          "(figures scale with contention)")

    with tempfile.TemporaryDirectory() as cfg:
        app, window = create_app([], AppSettings(cfg))
        window.resize(1360, 860)
        window.show()
        c = window.controller
        slits = SlitSet.generate(20, spacing_arcsec=2.0, width_arcsec=1.0,
                                 half_length_arcsec=40.0)
        c.set_maps(maps, geometry=truth.geometry, slits=slits)
        for _ in range(5):
            app.processEvents()
        item = window.map_view.slit_layer.items[7]

        # 0) the science alone: core's live re-measurement of one slit
        from gyrometer.core.tw import LiveMeasurer
        live = LiveMeasurer(maps, truth.geometry, slits)
        core = []
        for k in range(30):
            t = time.perf_counter()
            live.update_slit(7, slits.slits[7].with_(offset_arcsec=-5.0 + 0.05 * k))
            core.append(time.perf_counter() - t)
        print(f"core LiveMeasurer.update_slit (20 slits, 500x500): median "
              f"{1e3 * statistics.median(core):.1f} ms")

        # 1) cost of one complete update
        costs = []
        for k in range(60):
            before = c.live_updates
            t = time.perf_counter()
            item.drag_by(0.3 * (k % 20), 0.2 * (k % 20))
            while c.live_updates == before:
                c._flush_live() if c._timer.isActive() else None
                app.processEvents()
            costs.append(time.perf_counter() - t)
        item.drag_by(0.0, 0.0, finish=True)
        med = statistics.median(costs[5:])
        print(f"one update (move + recompute + redraw + paint events): median "
              f"{1e3 * med:.1f} ms -> {1.0 / med:.0f} updates/s sustainable")

        # 2) a fast drag, events every 8 ms, coalesced by the controller
        before = c.live_updates
        t_start = time.perf_counter()
        k = 0
        next_event = t_start
        while time.perf_counter() - t_start < 2.0:
            now = time.perf_counter()
            if now >= next_event:
                k += 1
                item.drag_by(0.05 * k, 0.03 * k)
                next_event += 0.008
            app.processEvents()
        item.drag_by(0.05 * k, 0.03 * k, finish=True)
        elapsed = time.perf_counter() - t_start
        done = c.live_updates - before
        print(f"fast drag: {k} mouse events in {elapsed:.1f} s, {done} recomputes "
              f"-> {done / elapsed:.0f} updates/s shown (goal >= 20)")
        window.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
