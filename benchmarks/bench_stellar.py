"""Speed of the absorption-line (slit-spectra) route on an IFU-sized cube.

Run: ``.venv/bin/python benchmarks/bench_stellar.py`` (a few minutes the
first time). Builds once, into ``benchmarks/_data/`` (git-ignored), a
synthetic absorption-line cube of 320 x 320 spaxels x 3700 channels (AWAV,
1.25 A from 4750 A, as a MUSE wide-field cube; DOMAIN notes sec. 7), float32
with a VARIANCE extension (about 2.8 GiB in all), written channel block by
channel block so it is never held in memory. The galaxy is an invented
barred disk ("LBDP-037") whose spectra carry the calcium-triplet lines of
:mod:`gyrometer.core.synthetic_stellar`. (The emission-line cube of
``bench_moments.py`` has no absorption lines, so it is not reused.)

Then times :func:`gyrometer.core.stellar.measure_absorption` for twenty
slits, reported per stage from the progress callback:

(a) the CaT window (8450-8950 A observed): read the channels of the window,
    sum the slit spectra, build the galaxy template, fit the 20 spectra;
(b) the whole axis read and fitted (worst case);
(c) (a) plus a noise Monte Carlo of 20 draws per slit (the error budget).

Goal: (a) and (b) under 10 s on 2 cores. Not a test: no pass/fail. Options:
``--data DIR``, ``--no-variance`` (build/read without the VARIANCE HDU).
"""

from __future__ import annotations

import argparse
import os
import time
from pathlib import Path

import numpy as np
from astropy.io import fits

from gyrometer.core.fitsio import load_cube
from gyrometer.core.safeio import atomic_output
from gyrometer.core.slits import SlitSet
from gyrometer.core.stellar import StellarSettings, measure_absorption
from gyrometer.core.synthetic import barred_model, model_wcs
from gyrometer.core.synthetic_stellar import absorption_scene

NY = NX = 320
N_CHAN = 3700
LAM0_AA, DLAM_AA = 4750.0, 1.25
BLOCK = 64


def _model():
    return barred_model(name="LBDP-037", shape=(NY, NX), pixel_scale_arcsec=0.2,
                        bar_radius_kpc=2.0, disk_scale_kpc=1.5, dispersion_kms=90.0,
                        psf_fwhm_arcsec=0.8, subsample=2, noise_frac=0.02)


def _headers(model) -> tuple[fits.Header, fits.Header]:
    wcs_cards = model_wcs(model).to_header()
    primary = fits.Header()
    primary["SIMPLE"] = True
    primary["BITPIX"] = -32
    primary["NAXIS"] = 3
    primary["NAXIS1"], primary["NAXIS2"], primary["NAXIS3"] = NX, NY, N_CHAN
    primary["EXTEND"] = True
    for card in wcs_cards.cards:
        if card.keyword not in ("WCSAXES", "DATE-OBS", "MJD-OBS", "MJDREF"):
            primary[card.keyword] = (card.value, card.comment)
    primary["CTYPE3"], primary["CUNIT3"] = "AWAV", "Angstrom"
    primary["CRVAL3"], primary["CDELT3"], primary["CRPIX3"] = LAM0_AA, DLAM_AA, 1.0
    primary["BUNIT"] = "1e-20 erg/(s cm2 Angstrom)"
    primary["OBJECT"] = model.name
    primary["PSF_FWHM"] = model.psf_fwhm_arcsec
    primary["SPECSYS"] = "BARYCENT"
    var = fits.Header()
    var["XTENSION"] = "IMAGE"
    var["BITPIX"] = -32
    var["NAXIS"] = 3
    var["NAXIS1"], var["NAXIS2"], var["NAXIS3"] = NX, NY, N_CHAN
    var["PCOUNT"], var["GCOUNT"] = 0, 1
    for key in primary:
        if key.startswith(("CTYPE", "CUNIT", "CRVAL", "CDELT", "CRPIX", "PC", "RADESYS",
                           "EQUINOX", "LONPOLE", "LATPOLE", "SPECSYS")):
            var[key] = primary[key]
    var["BUNIT"] = "(1e-20 erg/(s cm2 Angstrom))**2"
    var["EXTNAME"] = "VARIANCE"
    return primary, var


def build_cube(path: Path, with_variance: bool) -> None:
    model = _model()
    wave = LAM0_AA + DLAM_AA * np.arange(N_CHAN)
    scene = absorption_scene(model, wave_A=wave, snr=60.0)
    primary, var = _headers(model)
    rng = np.random.default_rng(20260101)
    with atomic_output(path, overwrite=True, suffix=".fits") as tmp:
        with open(tmp, "wb") as handle:
            handle.write(primary.tostring().encode("ascii"))
            for start in range(0, N_CHAN, BLOCK):
                stop = min(start + BLOCK, N_CHAN)
                block = scene.planes(start, stop, rng=rng)
                handle.write(block.astype(">f4").tobytes())
            handle.write(b"\0" * ((-handle.tell()) % 2880))
            if with_variance:
                handle.write(var.tostring().encode("ascii"))
                plane = np.full((BLOCK, NY, NX), scene.noise_sigma ** 2, dtype=">f4")
                for start in range(0, N_CHAN, BLOCK):
                    stop = min(start + BLOCK, N_CHAN)
                    handle.write(plane[:stop - start].tobytes())
                handle.write(b"\0" * ((-handle.tell()) % 2880))


class _Stages:
    """Progress callback that records when each stage ends and prints a bar."""

    def __init__(self) -> None:
        self.t0 = time.perf_counter()
        self.ends: dict[str, float] = {}
        self.last = -1

    def __call__(self, done: int, total: int, stage: str) -> None:
        self.ends[stage] = time.perf_counter() - self.t0
        pct = int(100 * done / max(total, 1))
        if pct // 25 != self.last // 25 or done == total:
            self.last = pct
            print(f"    {stage}: {pct:3d} %", flush=True)


def run(cube, truth_omega, settings, label):
    slits = SlitSet.generate(20, 1.2, 1.0, 30.0)
    model = _model()
    stages = _Stages()
    t0 = time.perf_counter()
    result = measure_absorption(cube, model.geometry, slits, settings, warn=False,
                                progress=stages)
    elapsed = time.perf_counter() - t0
    m = result.measurement
    prev = 0.0
    parts = []
    for stage, end in stages.ends.items():
        parts.append(f"{stage} {end - prev:.2f} s")
        prev = end
    print(f"({label}) {elapsed:.2f} s total [{'; '.join(parts)}]")
    print(f"    Omega_p = {m.omega_p_kms_arcsec:.3f} +/- {m.omega_p_err_kms_arcsec:.3f}"
          f" km/s/arcsec (model {truth_omega:.3f}); {result.grid.size} log-lambda"
          f" pixels; template: {result.template.origin}")
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", type=Path, default=Path(__file__).parent / "_data")
    parser.add_argument("--no-variance", action="store_true")
    args = parser.parse_args()
    with_var = not args.no_variance
    name = f"bench_stellar_{NX}x{NY}x{N_CHAN}{'' if with_var else '_novar'}.fits"
    path = args.data / name
    if not path.exists():
        t0 = time.perf_counter()
        build_cube(path, with_var)
        print(f"built {path.name} in {time.perf_counter() - t0:.1f} s")
    print(f"cube {NX} x {NY} x {N_CHAN} float32, file {path.stat().st_size / 2**20:.0f}"
          f" MiB{' with VARIANCE' if with_var else ''}")
    print(f"load average (1 min) {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    t0 = time.perf_counter()
    cube = load_cube(path)
    print(f"load_cube (header, checks, SHA-256): {time.perf_counter() - t0:.2f} s")
    model = _model()
    kpa = model.kpc_per_arcsec
    truth = model.patterns[0].omega_p_kms_kpc * kpa
    cat = StellarSettings(fit_window_A=(8450.0, 8950.0),
                          continuum_band_A=(8600.0, 8680.0), n_mc=0)
    run(cube, truth, cat, "a: CaT window")
    whole = StellarSettings(n_mc=0)
    run(cube, truth, whole, "b: whole axis")
    mc = StellarSettings(fit_window_A=(8450.0, 8950.0),
                         continuum_band_A=(8600.0, 8680.0), n_mc=20)
    run(cube, truth, mc, "c: CaT window + 20 noise draws per slit")


if __name__ == "__main__":
    main()
