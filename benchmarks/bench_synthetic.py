"""Timing of the synthetic galaxy generator (prints figures; not a test).

Goals: a 128x128 noiseless map set in < ~2 s, a 64x64x60 cube in a few
seconds, the bundled samples in well under a minute.

Run: python benchmarks/bench_synthetic.py
"""

import tempfile
import time

from gyrometer.core import samples, synthetic


def _time(label, func, repeat=3):
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - start)
    print(f"{label:<48s} {best:8.3f} s (best of {repeat})")


def main():
    bar = synthetic.barred_model(shape=(128, 128), pixel_scale_arcsec=1.0)
    _time("make_maps 128x128, no PSF, 3x3 sub-pixels",
          lambda: synthetic.make_maps(bar, noise=False))
    psf = bar.with_(psf_fwhm_arcsec=3.0, wcs_rotation_deg=30.0)
    _time("make_maps 128x128, PSF 3\", rotated WCS",
          lambda: synthetic.make_maps(psf, noise=False))
    two = synthetic.two_pattern_model()
    _time("make_maps 128x128, bar + spiral",
          lambda: synthetic.make_maps(two, noise=False))
    small = bar.with_(shape=(64, 64), pixel_scale_arcsec=2.0,
                      psf_fwhm_arcsec=4.0)
    _time("make_cube 64x64x60 halpha-air, PSF",
          lambda: synthetic.make_cube(small, n_channels=60))
    _time("make_cube 64x64x60 hi-freq, PSF",
          lambda: synthetic.make_cube(small, spectral="hi-freq",
                                      n_channels=60))
    _time("continuity_residual (1200 x 720 polar grid)",
          lambda: synthetic.continuity_residual(two), repeat=1)
    with tempfile.TemporaryDirectory() as folder:
        _time("write_samples (3 galaxies, 7 files)",
              lambda: samples.write_samples(folder, overwrite=True), repeat=1)


if __name__ == "__main__":
    main()
