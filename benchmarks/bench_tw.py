"""Speed of the Tremaine-Weinberg engine (prints figures; not a test).

Run: ``.venv/bin/python benchmarks/bench_tw.py``

1. Integrals + York fit for 20 slits on a 500 x 500 map, weights
   precomputed (prepare_slits): (a) every slit's integrals recomputed from
   the maps;
   (b) the live path with cached per-slit sums. Target <= 5 ms.
2. Dragging: one slit's exact weights and sums recomputed, all slits
   combined and refitted (LiveMeasurer.update_slit).
3. A 1,000-draw uncertainty budget (all terms) on a 300 x 300 map;
   target <= 2 s on 2 cores.
"""

from __future__ import annotations

import os
import statistics
import time

import numpy as np

from gyrometer.core import synthetic as syn
from gyrometer.core.budget import BudgetSettings, run_budget
from gyrometer.core.slits import SlitSet
from gyrometer.core.tw import (LiveMeasurer, fit_pattern_speed, prepare_slits,
                               slit_integrals_maps)


def _maps(n: int, scale: float):
    geo = syn._default_geometry(pa_deg=30.0, inc_deg=50.0, pa_err_deg=3.0,
                                center_err_arcsec=0.3, inc_err_deg=3.0)
    model = syn.barred_model(geometry=geo, bar_radius_kpc=3.0, shape=(n, n),
                             pixel_scale_arcsec=scale, subsample=1)
    maps, _ = syn.make_maps(model, rng=np.random.default_rng(0))
    return maps, geo


def _median_ms(func, repeat: int) -> str:
    """Median wall-clock and CPU time of ``func``, ms, as text."""
    wall, cpu = [], []
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        func()
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return (f"median {1e3 * statistics.median(wall):.2f} ms wall, "
            f"{1e3 * statistics.median(cpu):.2f} ms CPU")


def main() -> None:
    print(f"cores available: {os.cpu_count()}, load average "
          f"{os.getloadavg()[0]:.1f} (figures scale with the machine's load)")
    maps, geo = _maps(500, 0.2)                       # 100" field
    slits = SlitSet.generate(20, 2.0, 1.0, 45.0)      # 20 slits, 1" wide, 90" long
    live = LiveMeasurer(maps, geo, slits)
    weights = live.weights
    n_pix = sum(w.weight.size for w in weights)
    prepared = prepare_slits(weights)
    full = lambda: fit_pattern_speed(slit_integrals_maps(maps, geo, prepared))  # noqa: E731
    full()
    print(f"[1a] all slit integrals + fit, 20 slits, 500x500 ({n_pix} weighted "
          f"pixels): {_median_ms(full, 200)} (target <= 5 ms)")
    live.measure()
    print(f"[1b] cached per-slit sums combined + fit: {_median_ms(live.measure, 200)}")
    moved = [slits.slits[3].with_(offset_arcsec=-15.0 + 0.01 * k) for k in range(100)]
    it = iter(moved)
    print("[2] one slit's weights and sums recomputed + re-measure: "
          f"{_median_ms(lambda: live.update_slit(3, next(it)), 100)}")

    maps, geo = _maps(300, 0.5)                       # 150" field
    slits = SlitSet.generate(11, 4.0, 2.0, 60.0)      # 11 slits, 2" wide, 120" long
    for workers in (1, 2):
        settings = BudgetSettings(n_draws=1000, seed=1, workers=workers)
        t0, c0 = time.perf_counter(), time.process_time()
        budget = run_budget(maps, geo, slits, settings)
        dt, dc = time.perf_counter() - t0, time.process_time() - c0
        print(f"[3] 1000-draw budget (5 terms + combined), 11 slits, 300x300, "
              f"workers={workers}: {dt:.2f} s wall, {dc:.2f} s CPU in the main "
              f"process (target <= 2 s on 2 cores)")
    for t in budget.terms:
        print(f"    {t.name:15s} median {t.median:7.3f}  -{t.median - t.p16:.3f} "
              f"+{t.p84 - t.median:.3f} km/s/arcsec  share {t.share:.2f}")


if __name__ == "__main__":
    main()
