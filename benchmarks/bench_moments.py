"""Speed and memory of moment maps from a large cube (prints figures).

Run: ``.venv/bin/python benchmarks/bench_moments.py`` (about a minute the
first time). Builds once, into ``benchmarks/_data/`` (git-ignored), an
IFU-sized float32 cube of 320 x 320 spaxels x 3700 channels (AWAV, 1.25 A
from 4750 A, about 1.4 GiB; DOMAIN notes sec. 7), written channel block by
channel block so it is never held in memory. Then times

(a) one streamed read-and-sum pass over the file (numpy memory map, blocks
    of 64 channels summed in float64), cold-ish then warm page cache;
(b) :func:`gyrometer.core.moments.compute_moments` on the memory-mapped
    cube (first run and best of two) for three settings: the whole axis without a mask, a realistic
    +/-500 km/s window around H-alpha with the smooth mask, and the smooth
    mask over nearly the whole axis (the stress case);

and reports the ratio (b)/(a) and the peak memory: VmHWM (which counts the
file pages mapped in) and the peak anonymous (non-file) resident memory,
sampled at every progress report. Goals: moments within 3x of the streamed
pass; peak memory <= mapped pages + 512 MiB.

Options: ``--channels N`` (default 3700) and ``--data DIR`` to try smaller
cubes elsewhere. Not a test: no pass/fail.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np
from astropy.io import fits

from gyrometer.core.fitsio import load_cube
from gyrometer.core.moments import MomentSettings, compute_moments
from gyrometer.core.safeio import atomic_output
from gyrometer.core.spectral import vacuum_to_air

NY = NX = 320
LAM0_AA, DLAM_AA = 4750.0, 1.25
VSYS_KMS = 1500.0
C_KMS = 299792.458
BLOCK = 64


def _start_aa(n_chan: int) -> float:
    """4750 A (the full-size cube), or a start that keeps H-alpha inside."""
    if LAM0_AA + DLAM_AA * n_chan > 6700.0:
        return LAM0_AA
    return 6600.0 - DLAM_AA * n_chan / 2


def _header(n_chan: int) -> fits.Header:
    header = fits.Header()
    header["SIMPLE"] = True
    header["BITPIX"] = -32
    header["NAXIS"] = 3
    header["NAXIS1"], header["NAXIS2"], header["NAXIS3"] = NX, NY, n_chan
    header["CTYPE1"], header["CTYPE2"] = "RA---TAN", "DEC--TAN"
    header["CRVAL1"], header["CRVAL2"] = 150.0, 2.0
    header["CRPIX1"], header["CRPIX2"] = NX / 2 + 0.5, NY / 2 + 0.5
    header["CDELT1"], header["CDELT2"] = -0.2 / 3600, 0.2 / 3600
    header["CTYPE3"], header["CUNIT3"] = "AWAV", "Angstrom"
    header["CRVAL3"], header["CDELT3"] = _start_aa(n_chan), DLAM_AA
    header["CRPIX3"] = 1.0
    header["BUNIT"] = "1e-20 erg/(s cm2 Angstrom)"
    header["OBJECT"] = "LBDP-011"
    header["PSF_FWHM"] = 0.8
    header["SPECSYS"] = "BARYCENT"
    return header


def build_cube(path: Path, n_chan: int) -> None:
    """Write a synthetic cube block by block: continuum, noise and an
    H-alpha line following a rotating-disk velocity field."""
    header = _header(n_chan)
    y, x = np.mgrid[0:NY, 0:NX].astype(np.float32)
    r = np.hypot(x - NX / 2, y - NY / 2)
    v_field = VSYS_KMS + 200.0 * np.tanh(r / 30.0) * (x - NX / 2) / np.maximum(r, 1)
    flux = 50.0 * np.exp(-r / 60.0)
    halpha_air = float(vacuum_to_air(6564.608))
    centre_aa = (halpha_air * (1 + v_field / C_KMS)).astype(np.float32)
    sigma_aa = np.float32(halpha_air * 60.0 / C_KMS)
    rng = np.random.default_rng(20260101)
    with atomic_output(path, overwrite=True, suffix=".fits") as tmp:
        with open(tmp, "wb") as handle:
            handle.write(header.tostring().encode("ascii"))
            for start in range(0, n_chan, BLOCK):
                stop = min(start + BLOCK, n_chan)
                lam = (_start_aa(n_chan)
                       + DLAM_AA * np.arange(start, stop, dtype=np.float32))
                block = rng.standard_normal((stop - start, NY, NX),
                                            dtype=np.float32)
                block += 5.0
                near = np.abs(lam - halpha_air) < 30.0
                if near.any():
                    d = lam[near, None, None] - centre_aa
                    block[near] += flux * np.exp(-0.5 * (d / sigma_aa) ** 2)
                handle.write(block.astype(">f4").tobytes())
            size = handle.tell()
            handle.write(b"\0" * ((-size) % 2880))


def _status_kib(key: str) -> int:
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    return 0


class _PeakAnon:
    """Progress callback that samples the anonymous resident memory."""

    def __init__(self) -> None:
        self.peak_kib = _status_kib("RssAnon")

    def __call__(self, done: int, total: int, stage: str) -> None:
        self.peak_kib = max(self.peak_kib, _status_kib("RssAnon"))


def streamed_sum(path: Path, n_chan: int, offset: int) -> float:
    data = np.memmap(path, dtype=">f4", mode="r", offset=offset,
                     shape=(n_chan, NY, NX))
    t0 = time.perf_counter()
    total = np.zeros((NY, NX))
    for start in range(0, n_chan, BLOCK):
        total += data[start:start + BLOCK].sum(axis=0, dtype=np.float64)
    elapsed = time.perf_counter() - t0
    del data
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=3700)
    parser.add_argument("--data", type=Path,
                        default=Path(__file__).parent / "_data")
    args = parser.parse_args()
    path = args.data / f"bench_cube_{NX}x{NY}x{args.channels}.fits"
    if not path.exists():
        t0 = time.perf_counter()
        build_cube(path, args.channels)
        print(f"built {path.name} in {time.perf_counter() - t0:.1f} s")
    size_mib = path.stat().st_size / 2**20
    offset = len(_header(args.channels).tostring())
    print(f"cube {NX} x {NY} x {args.channels} float32, file {size_mib:.0f} MiB")

    t_first = streamed_sum(path, args.channels, offset)
    t_read = streamed_sum(path, args.channels, offset)
    print(f"(a) streamed read-and-sum: {t_first:.2f} s first, {t_read:.2f} s "
          f"warm ({size_mib / t_read:.0f} MiB/s)")

    t0 = time.perf_counter()
    cube = load_cube(path)
    print(f"load_cube (header, checks, SHA-256 of the file): "
          f"{time.perf_counter() - t0:.2f} s")
    line_vsys = MomentSettings(line="Halpha", vsys_kms=VSYS_KMS,
                               window_halfwidth_kms=500.0)
    halpha_air = float(vacuum_to_air(6564.608))
    lam = _start_aa(args.channels) + DLAM_AA * np.arange(args.channels)
    v_all = C_KMS * (lam / halpha_air - 1)  # rough, for choosing the window
    margin = 40 * DLAM_AA / halpha_air * C_KMS
    wide = MomentSettings(line="Halpha", vsys_kms=float(v_all.mean()),
                          window_halfwidth_kms=float(np.ptp(v_all) / 2 - margin),
                          continuum="none")
    cases = (
        ("whole axis, no mask", MomentSettings(line="Halpha", mask="none",
                                               continuum="none")),
        ("H-alpha +/-500 km/s, smooth mask", line_vsys),
        ("nearly whole axis, smooth mask", wide),
    )
    for label, settings in cases:
        peak = _PeakAnon()
        times = []
        for _ in range(2):  # the first run also maps the file's pages in
            t0 = time.perf_counter()
            maps = compute_moments(cube, settings, progress=peak)
            times.append(time.perf_counter() - t0)
        best = min(times)
        print(f"(b) {label}: {times[0]:.2f} s first, {best:.2f} s best = "
              f"{best / t_read:.2f} x the warm streamed pass; peak anonymous "
              f"RSS {peak.peak_kib / 1024:.0f} MiB; median mom1 "
              f"{np.nanmedian(maps.velocity_kms):.1f} km/s")
    hwm = _status_kib("VmHWM") / 1024
    print(f"peak RSS (VmHWM, includes mapped file pages) {hwm:.0f} MiB vs file "
          f"{size_mib:.0f} MiB: {hwm - size_mib:+.0f} MiB over the mapped size")


if __name__ == "__main__":
    main()
