"""Throughput of sample runs: galaxies per minute for 1 and 2 local workers.

Makes N small synthetic barred galaxies (invented LBDP names; 64x64 map
sets, 100 Monte Carlo draws per error source, no figures), then runs the
same sample on the serial engine and on the local process pool with 1 and 2
workers, each into a fresh run folder. Wall times include starting the
worker processes (each imports numpy, scipy and astropy once). Also
measures how many cores are actually free (the machine may be shared), the
ceiling of the speed-up. Prints figures; not a test.

Run: python benchmarks/bench_survey.py [N]   (default N = 8)
"""

import os
import sys
import tempfile
import time
from pathlib import Path

# one math-library thread per worker (what ``gyrometer sample`` does for the
# local engine); must be set before numpy is imported
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

from gyrometer.core import survey
from gyrometer.core.fitsio import write_mapset
from gyrometer.core.synthetic import barred_model, make_maps

_RECIPE = """[galaxy]
name = "{name}"
[input]
kind = "maps"
maps = "{name}_maps.fits"
[geometry]
mode = "given"
ra_deg = 150.1234
dec_deg = -12.3456
pa_deg = 30.0
inc_deg = 50.0
vsys_kms = 2000.0
distance_mpc = 20.0
pa_err_deg = 2.0
inc_err_deg = 2.0
"""

_SAMPLE = """[sample]
name = "LBDP benchmark"
recipes = ["*.toml"]
[defaults.uncertainty]
draws = 300
[defaults.bar]
length_arcsec = 0
[defaults.output]
figures = []
tables = ["ecsv"]
"""


def _make(folder: Path, n: int) -> Path:
    for k in range(n):
        name = f"LBDP-{201 + k:03d}"
        model = barred_model(name=name, omega_p_kms_kpc=30.0 + 2.0 * k,
                             shape=(96, 96), pixel_scale_arcsec=0.8,
                             psf_fwhm_arcsec=2.0, seed=k)
        maps, _ = make_maps(model)
        write_mapset(folder / f"{name}_maps.fits", maps)
        (folder / f"{name}.toml").write_text(_RECIPE.format(name=name))
    sample = folder / "sample.sample"
    sample.write_text(_SAMPLE)
    return sample


def _spin(n: int = 5_000_000) -> int:
    total = 0
    for i in range(n):
        total += i
    return total


def _free_cores() -> float:
    """Cores actually free: time of 1 spin loop vs 2 in parallel."""
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    times = []
    for k in (1, 2):
        start = time.perf_counter()
        procs = [ctx.Process(target=_spin) for _ in range(k)]
        for p in procs:
            p.start()
        for p in procs:
            p.join()
        times.append(time.perf_counter() - start)
    return 2.0 * times[0] / times[1]


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 8
    print(f"{n} synthetic galaxies, 96x96 maps, 300 draws per error source, rotation curve and resonances; "
          f"{os.cpu_count()} CPUs on this machine; load average at the "
          f"start {os.getloadavg()[0]:.1f}")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        sample = _make(folder, n)
        spec = survey.load_sample(sample)
        rates = {}
        for label, engine, workers in (("serial (in process)", "serial", 1),
                                       ("local pool, 1 worker", "local", 1),
                                       ("local pool, 2 workers", "local", 2)):
            start = time.perf_counter()
            run = survey.run_sample(spec, engine=engine, workers=workers,
                                    output_dir=folder / f"run-{engine}-{workers}")
            wall = time.perf_counter() - start
            assert run.n_done == n, run.outcomes
            per_galaxy = sum(o.duration_s for o in run.outcomes) / n
            rates[label] = 60.0 * n / wall
            print(f"{label:<24s} {wall:7.1f} s wall  {rates[label]:6.1f} "
                  f"galaxies/min  ({per_galaxy:.2f} s per galaxy inside "
                  f"the worker)")
        print("load average (1, 5, 15 min) at the end: "
              + ", ".join(f"{x:.1f}" for x in os.getloadavg())
              + " (other work on the machine slows every figure)")
        print(f"cores free for this benchmark (2 parallel spin loops vs 1): "
              f"{_free_cores():.2f}")
        one, two = rates["local pool, 1 worker"], rates["local pool, 2 workers"]
        print(f"speed-up 2 workers / 1 worker: {two / one:.2f}x "
              f"(parallel efficiency {50.0 * two / one:.0f} %)")


if __name__ == "__main__":
    main()
