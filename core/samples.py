"""The bundled sample data: three synthetic galaxies of the Lantern Barred Disk Programme.

The Lantern Barred Disk Programme (LBDP) is an invented survey; its galaxies
do not exist. The files are made by :mod:`gyrometer.core.synthetic`, so their
pattern speeds are known exactly and written next to them as JSON:

* ``LBDP-011_halpha_cube.fits``: an optical integral-field H-alpha cube
  (air wavelengths, ``AWAV``) with a ``VARIANCE`` extension, ionised gas
  flowing through a fast bar;
* ``LBDP-023_hi_cube.fits``: a radio HI cube on a frequency axis
  (``FREQ``) of a galaxy with a bar and a slower spiral (two pattern speeds);
* ``LBDP-037_stellar_maps.fits``: a stellar-kinematics map set (intensity,
  velocity, dispersion and their errors) of a barred disk on a rotated WCS;
* ``<name>_truth.json``: the true values (:meth:`Truth.to_dict`);
* ``LBDP-011_rotation_curve.ecsv``: a rotation-curve table (radius in
  arcsec, ``vc`` and ``vc_err`` in km/s) sampled from the input curve with
  Gaussian scatter.

Everything is seeded and written without dates, so the files are
byte-for-byte reproducible. Data values are rounded to about 1/1000 of
their noise level (a power of ten) and JSON numbers to 10 significant digits
before they are written (harmless, as the noise is 1000 times larger) so
that last-bit differences between platforms' math libraries do not change
the bytes. Regenerate with::

    python -m gyrometer.core.samples sample_cubes --force
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
from astropy.table import Table

from .errors import GyrometerError
from .fitsio import write_cube, write_mapset
from .geometry import DiskGeometry
from .safeio import atomic_output, check_writable, write_text_atomic
from .synthetic import (GalaxyModel, PatternSpec, Truth, make_cube,
                        make_maps, rotation_velocity_kms)

__all__ = ["SAMPLE_FILES", "sample_models", "write_samples", "main"]

#: Names of the files :func:`write_samples` creates, in order.
SAMPLE_FILES = (
    "LBDP-011_halpha_cube.fits",
    "LBDP-011_truth.json",
    "LBDP-011_rotation_curve.ecsv",
    "LBDP-023_hi_cube.fits",
    "LBDP-023_truth.json",
    "LBDP-037_stellar_maps.fits",
    "LBDP-037_truth.json",
)

_PROGRAMME = "Lantern Barred Disk Programme (LBDP, invented)"


def sample_models() -> dict[str, GalaxyModel]:
    """The three sample galaxies (invented), keyed by name."""
    lbdp011 = GalaxyModel(
        name="LBDP-011",
        geometry=DiskGeometry(ra_deg=187.4172, dec_deg=8.2617, pa_deg=62.0,
                              inc_deg=45.0, vsys_kms=1850.0,
                              distance_mpc=18.0, source="synthetic truth"),
        disk_scale_kpc=2.2, v_flat_kms=210.0, r_turn_kpc=0.8,
        patterns=(PatternSpec("bar", 60.0, 0.45, 0.0, 3.2, angle_deg=50.0),),
        dispersion_kms=25.0, shape=(96, 96), pixel_scale_arcsec=1.0,
        psf_fwhm_arcsec=1.8, sigma0=50.0, noise_frac=0.01,
        velocity_noise_kms=4.0, tracer="ionised gas", kinematics="flow",
        seed=11)
    lbdp023 = GalaxyModel(
        name="LBDP-023",
        geometry=DiskGeometry(ra_deg=201.8835, dec_deg=-27.5102, pa_deg=215.0,
                              inc_deg=55.0, vsys_kms=1240.0,
                              distance_mpc=12.0, source="synthetic truth"),
        disk_scale_kpc=4.0, v_flat_kms=180.0, r_turn_kpc=1.2,
        patterns=(PatternSpec("bar", 44.0, 0.4, 0.0, 3.5, angle_deg=35.0),
                  PatternSpec("spiral", 20.0, 0.3, 4.5, 10.0, angle_deg=20.0,
                              pitch_deg=18.0)),
        dispersion_kms=10.0, shape=(64, 64), pixel_scale_arcsec=6.0,
        wcs_rotation_deg=20.0, psf_fwhm_arcsec=15.0, sigma0=2.0,
        noise_frac=0.01, tracer="HI", kinematics="flow", seed=23)
    lbdp037 = GalaxyModel(
        name="LBDP-037",
        geometry=DiskGeometry(ra_deg=36.2764, dec_deg=-4.9031, pa_deg=118.0,
                              inc_deg=38.0, vsys_kms=2630.0,
                              distance_mpc=30.0, source="synthetic truth"),
        disk_scale_kpc=1.8, v_flat_kms=230.0, r_turn_kpc=0.6,
        patterns=(PatternSpec("bar", 70.0, 0.5, 0.0, 2.6, angle_deg=120.0),),
        dispersion_kms=90.0, shape=(128, 128), pixel_scale_arcsec=0.4,
        wcs_rotation_deg=35.0, psf_fwhm_arcsec=1.0, sigma0=1000.0,
        noise_frac=0.005, velocity_noise_kms=4.0, tracer="stars",
        kinematics="flow", seed=37)
    return {m.name: m for m in (lbdp011, lbdp023, lbdp037)}


def _power_of_ten_below(value: float) -> float:
    """The largest power of ten <= ``value`` (a platform-stable step)."""
    return 10.0 ** math.floor(math.log10(value))


def _quantise(values: np.ndarray, step: float) -> np.ndarray:
    """Round to multiples of ``step``.

    Last-bit differences between platforms' vectorised math then almost
    never reach the written bytes (a value must lie within one ulp of a
    rounding boundary to change).
    """
    return np.round(np.asarray(values, dtype=float) / step) * step


def _round_floats(value, digits: int = 10):
    """Round every float of a JSON-ready structure to ``digits`` significant
    digits (same reason as :func:`_quantise`)."""
    if isinstance(value, float):
        return float(f"{value:.{digits}g}")
    if isinstance(value, dict):
        return {k: _round_floats(v, digits) for k, v in value.items()}
    if isinstance(value, list):
        return [_round_floats(v, digits) for v in value]
    return value


def _truth_json(truth: Truth, files: list[str], extra: dict) -> str:
    record = {"programme": _PROGRAMME, "synthetic": True, "files": files}
    record.update(extra)
    record["truth"] = _round_floats(truth.to_dict())
    return json.dumps(record, indent=2) + "\n"


def _quantised_cube(cube, keep_variance: bool):
    """Cube rounded to 1/1000 of its noise (a power of ten) for stable bytes."""
    variance = _quantise(cube.variance, _power_of_ten_below(
        float(cube.variance.flat[0])) * 1e-6)
    step = _power_of_ten_below(math.sqrt(float(variance.flat[0])) / 1000.0)
    return replace(cube, data=_quantise(cube.data, step).astype(np.float32),
                   variance=(variance.astype(np.float32) if keep_variance
                             else None))


def _rotation_curve_table(model: GalaxyModel, rng: np.random.Generator
                          ) -> Table:
    kpa = model.kpc_per_arcsec
    radius = np.arange(4.0, 52.0, 2.0)                     # arcsec
    vc = rotation_velocity_kms(model, radius * kpa)
    err = 4.0 + 0.05 * radius
    observed = vc + rng.normal(0.0, 1.0, radius.size) * err
    table = Table()
    table["radius"] = np.round(radius, 3)
    table["radius"].unit = "arcsec"
    table["radius"].description = "galactocentric radius in the disk plane"
    table["vc"] = np.round(observed, 2)
    table["vc"].unit = "km / s"
    table["vc"].description = "circular velocity"
    table["vc_err"] = np.round(err, 2)
    table["vc_err"].unit = "km / s"
    table["vc_err"].description = "1-sigma uncertainty of vc"
    table.meta["object"] = model.name
    table.meta["programme"] = _PROGRAMME
    table.meta["distance_mpc"] = model.geometry.distance_mpc
    table.meta["inc_deg"] = model.geometry.inc_deg
    table.meta["model"] = ("synthetic: arctan curve vc = (2/pi) v_flat "
                           "arctan(R / r_turn) plus Gaussian scatter")
    table.meta["v_flat_kms"] = model.v_flat_kms
    table.meta["r_turn_kpc"] = model.r_turn_kpc
    return table


def write_samples(folder: str | os.PathLike, overwrite: bool = False,
                  progress=None) -> list[Path]:
    """Write the bundled sample files into ``folder``.

    Parameters
    ----------
    folder : path-like
        Destination (created if missing).
    overwrite : bool
        Replace existing files; otherwise an existing file raises
        :class:`~gyrometer.core.errors.OutputError` before anything is
        written.
    progress : callable, optional
        ``progress(done, total, stage)``.

    Returns
    -------
    list of Path
        The files written, in the order of :data:`SAMPLE_FILES`.
    """
    folder = Path(folder)
    for name in SAMPLE_FILES:
        check_writable(folder / name, overwrite)
    models = sample_models()
    written: list[Path] = []
    total = len(SAMPLE_FILES)

    def done(path: Path) -> None:
        written.append(path)
        if progress is not None:
            progress(len(written), total, path.name)

    # LBDP-011: H-alpha cube (air wavelengths) + rotation curve
    m = models["LBDP-011"]
    cube, truth = make_cube(m, spectral="halpha-air", n_channels=40,
                            channel_width=0.45)
    cube = _quantised_cube(cube, keep_variance=True)
    path = write_cube(folder / SAMPLE_FILES[0], cube, overwrite=overwrite)
    done(path)
    path = write_text_atomic(folder / SAMPLE_FILES[1], _truth_json(
        truth, [SAMPLE_FILES[0], SAMPLE_FILES[2]],
        {"data": "optical IFU-like H-alpha cube, AWAV axis (air), 0.45 "
                 "Angstrom channels, instrumental sigma 40 km/s",
         "velocity_note": "velocities are V_sys + v_los in the optical "
                          "convention with the vacuum rest wavelength "
                          "6564.608 A (air axis converted with Morton 2000)"}),
        overwrite=overwrite)
    done(path)
    table = _rotation_curve_table(m, np.random.default_rng(m.seed + 1000))
    with atomic_output(folder / SAMPLE_FILES[2], overwrite=overwrite) as tmp:
        table.write(tmp, format="ascii.ecsv")
    done(folder / SAMPLE_FILES[2])

    # LBDP-023: HI cube, two pattern speeds (no variance: as usual for radio)
    m = models["LBDP-023"]
    cube, truth = make_cube(m, spectral="hi-freq", n_channels=48,
                            channel_width=-40.0e3)
    sigma = math.sqrt(float(cube.variance.flat[0]))
    cube = _quantised_cube(cube, keep_variance=False)
    path = write_cube(folder / SAMPLE_FILES[3], cube, overwrite=overwrite)
    done(path)
    path = write_text_atomic(folder / SAMPLE_FILES[4], _truth_json(
        truth, [SAMPLE_FILES[3]],
        {"data": f"radio HI cube, FREQ axis, 40 kHz channels, beam "
                 f"{m.psf_fwhm_arcsec} arcsec FWHM, noise "
                 f"{sigma:.3g} Jy/beam per channel",
         "velocity_note": "velocities are V_sys + v_los in the radio "
                          "convention (rest 1420405751.768 Hz)"}),
        overwrite=overwrite)
    done(path)

    # LBDP-037: stellar map set on a rotated WCS
    m = models["LBDP-037"]
    maps, truth = make_maps(m, intensity_unit="1e-20 erg / (s cm2 Angstrom)")
    i_step = _power_of_ten_below(float(maps.intensity_err.min()) / 1000.0)
    maps = replace(
        maps,
        intensity=_quantise(maps.intensity, i_step),
        intensity_err=_quantise(maps.intensity_err, i_step * 1e-3),
        velocity_kms=_quantise(maps.velocity_kms, 1e-3),
        velocity_err_kms=_quantise(maps.velocity_err_kms, 1e-3),
        dispersion_kms=_quantise(maps.dispersion_kms, 1e-3),
        dispersion_err_kms=_quantise(maps.dispersion_err_kms, 1e-3))
    path = write_mapset(folder / SAMPLE_FILES[5], maps, overwrite=overwrite)
    done(path)
    path = write_text_atomic(folder / SAMPLE_FILES[6], _truth_json(
        truth, [SAMPLE_FILES[5]],
        {"data": "stellar kinematics map set (continuum intensity, mean "
                 "velocity, dispersion and errors), WCS rotated by 35 deg",
         "velocity_note": "velocities are V_sys + v_los (optical "
                          "convention)"}),
        overwrite=overwrite)
    done(path)
    return written


def main(argv: list[str] | None = None) -> int:
    """Command line: ``python -m gyrometer.core.samples FOLDER [--force]``."""
    parser = argparse.ArgumentParser(
        prog="python -m gyrometer.core.samples",
        description="Write Gyrometer's synthetic sample galaxies (Lantern "
                    "Barred Disk Programme, invented) into FOLDER.")
    parser.add_argument("folder", help="destination folder")
    parser.add_argument("--force", action="store_true",
                        help="replace existing files")
    args = parser.parse_args(argv)
    try:
        paths = write_samples(args.folder, overwrite=args.force)
    except GyrometerError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    for p in paths:
        print(f"wrote {p} ({p.stat().st_size} bytes)")
    return 0


if __name__ == "__main__":  # pragma: no cover - command line
    raise SystemExit(main())
