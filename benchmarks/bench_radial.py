"""Speed of the radial Tremaine-Weinberg measurement (prints figures).

Run: ``.venv/bin/python benchmarks/bench_radial.py``. Times the system build,
the GCV choice of lam and the Monte Carlo on synthetic two-pattern disks of
two sizes. Not a test: no pass/fail, just numbers to watch.
"""

from __future__ import annotations

import time

import numpy as np

from gyrometer.core.radial import RadialSettings, measure_radial, radial_system
from gyrometer.core.slits import SlitSet
from gyrometer.core.synthetic import make_maps, two_pattern_model


def _best_of(fn, repeat: int = 3) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    for n_pix, scale, n_slits in ((128, 1.4, 21), (400, 0.45, 41)):
        model = two_pattern_model(shape=(n_pix, n_pix), pixel_scale_arcsec=scale,
                                  subsample=1)
        maps, truth = make_maps(model, noise=True, rng=np.random.default_rng(0))
        g = truth.geometry
        half = 0.49 * n_pix * scale
        spacing = 2 * half * g.cos_i * 0.9 / n_slits
        slits = SlitSet.generate(n_slits, spacing, spacing, 0.95 * half)
        t_sys = _best_of(lambda: radial_system(maps, g, slits))
        t_gcv = _best_of(lambda: measure_radial(maps, g, slits, warn=False))
        n_mc = 100
        t_mc = _best_of(lambda: measure_radial(
            maps, g, slits, RadialSettings(n_mc=n_mc, lam=0.1),
            rng=np.random.default_rng(1), warn=False), repeat=1)
        shape = radial_system(maps, g, slits).shape
        print(f"{n_pix}x{n_pix} px, {n_slits} slits, kernel {shape[0]}x{shape[1]}: "
              f"system {t_sys * 1e3:.0f} ms, measure with GCV {t_gcv * 1e3:.0f} ms, "
              f"{n_mc} Monte Carlo draws {t_mc:.2f} s")


if __name__ == "__main__":
    main()
