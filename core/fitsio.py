"""Reading and writing cubes and map sets in FITS.

Readers
-------
* :func:`load_cube` finds the 3D data HDU (primary or an extension such as
  ``DATA``/``SCI``/``FLUX``), its variance (``STAT``, ``VAR``, ``VARIANCE``;
  ``IVAR`` is inverted; ``ERR``/``ERROR``/``NOISE``/``SIGMA`` are squared),
  the celestial WCS (PC or CD, any rotation or flip) and the spectral axis
  of any standard FITS type (Greisen et al. 2006, A&A 446, 747: ``FREQ``,
  ``ENER``, ``WAVN``, ``WAVE``, ``AWAV``, ``VRAD``, ``VOPT``, ``ZOPT``,
  ``VELO``, ``BETA``, with or without a non-linear algorithm code, plus
  the AIPS ``VELO-xxx``/``FELO-xxx`` types that WCSLIB's ``spcfix``
  translates using ``VELREF``). Degenerate axes (the Stokes axis of radio
  cubes) are dropped. Data stay in a read-only memory map in numpy order
  ``(channel, y, x)``; scaled integer data (BSCALE/BZERO) cannot be
  memory-mapped as floats and are read in chunks into a float32 array.
* :func:`load_mapset` reads the maps of one tracer from one
  multi-extension file (Gyrometer's own layout, see :func:`write_mapset`, or
  common extension names) or from one file per map.
* :func:`open_data` sniffs whether a file is a cube or a map set.

Writers
-------
:func:`write_cube` and :func:`write_mapset` write Gyrometer's own layouts
through :func:`~gyrometer.core.safeio.atomic_output`. Output is
deterministic: identical input gives byte-identical files (no dates, no
checksums that depend on time).

Every user fault raises a subclass of
:class:`~gyrometer.core.errors.GyrometerError` naming the file and the fault.
"""

from __future__ import annotations

import hashlib
import math
import os
import warnings
from pathlib import Path
from typing import Any

import astropy.units as u
import numpy as np
from astropy.io import fits
from astropy.wcs import WCS, FITSFixedWarning

from .dataset import TRACERS, Cube, MapSet, Provenance, SpectralAxis
from .errors import (DataContentError, DataQualityWarning,
                     HeaderError, InputFileError, MapMismatchError,
                     OutputError, SpectralAxisError, UnitError)
from .progress import CancelFlag, ProgressCallback, check_cancel, report
from .safeio import atomic_output

__all__ = [
    "load_cube",
    "load_mapset",
    "open_data",
    "write_cube",
    "write_mapset",
    "read_image",
    "file_sha256",
    "MAP_EXTENSIONS",
]

#: Extension names of Gyrometer's map-set layout, by MapSet field.
MAP_EXTENSIONS = {
    "intensity": "INTENSITY",
    "intensity_err": "INTENSITY_ERR",
    "velocity_kms": "VELOCITY",
    "velocity_err_kms": "VELOCITY_ERR",
    "dispersion_kms": "DISPERSION",
    "dispersion_err_kms": "DISPERSION_ERR",
}

# Extension-name synonyms by role; the first entry is our own name.
_ROLE_NAMES = {
    "intensity": ("INTENSITY", "FLUX", "MOM0", "MOMENT0", "SB",
                  "SURFACE_BRIGHTNESS", "INT", "I"),
    "intensity_err": ("INTENSITY_ERR", "INTENSITY_ERROR", "FLUX_ERR",
                      "FLUX_ERROR", "EFLUX", "ERR_FLUX", "MOM0_ERR",
                      "EMOM0", "INT_ERR"),
    "velocity": ("VELOCITY", "VEL", "V", "MOM1", "MOMENT1", "VLOS",
                 "VELOCITY_FIELD"),
    "velocity_err": ("VELOCITY_ERR", "VELOCITY_ERROR", "VEL_ERR", "EVEL",
                     "EV", "V_ERR", "ERR_VEL", "MOM1_ERR", "EMOM1"),
    "dispersion": ("DISPERSION", "SIGMA", "DISP", "MOM2", "MOMENT2",
                   "VDISP"),
    "dispersion_err": ("DISPERSION_ERR", "DISPERSION_ERROR", "SIGMA_ERR",
                       "ESIGMA", "DISP_ERR", "MOM2_ERR", "EMOM2"),
}
# Inverse-variance synonyms: the map is 1/sigma^2 of the named role.
_ROLE_IVAR_NAMES = {
    "intensity_err": ("FLUX_IVAR", "INTENSITY_IVAR"),
    "velocity_err": ("VEL_IVAR", "VELOCITY_IVAR"),
    "dispersion_err": ("SIGMA_IVAR", "DISPERSION_IVAR"),
}

_DATA_EXT_NAMES = ("DATA", "SCI", "FLUX", "CUBE", "INTENSITY", "IMAGE")
_VARIANCE_NAMES = ("STAT", "VAR", "VARIANCE", "VARI")
_IVAR_NAMES = ("IVAR", "INVVAR", "IVARIANCE")
_ERROR_NAMES = ("ERR", "ERROR", "ERRS", "NOISE", "SIGMA", "RMS", "STDDEV")

# Spectral CTYPE families (first four characters), with the velocity
# convention each implies (FITS WCS III, Greisen et al. 2006, Table 1).
_SPECTRAL_TYPES = {
    "FREQ": "radio", "ENER": "radio", "WAVN": "radio",
    "WAVE": "optical", "AWAV": "optical",
    "VRAD": "radio", "VOPT": "optical", "ZOPT": "optical",
    "VELO": "relativistic", "BETA": "relativistic",
}
_PREFERRED_UNIT = {
    "FREQ": u.Hz, "ENER": u.eV, "WAVN": 1 / u.cm,
    "WAVE": u.AA, "AWAV": u.AA,
    "VRAD": u.km / u.s, "VOPT": u.km / u.s, "VELO": u.km / u.s,
    "ZOPT": u.dimensionless_unscaled, "BETA": u.dimensionless_unscaled,
}
_CHUNK_BYTES = 64 * 2**20
_VCONV = ("optical", "radio", "relativistic", "rest-frame")


# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------

def file_sha256(path: str | os.PathLike, block: int = 2**22) -> str:
    """Hex SHA-256 of a file, read in blocks of ``block`` bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while chunk := handle.read(block):
            digest.update(chunk)
    return digest.hexdigest()


def _check_path(path: str | os.PathLike) -> Path:
    target = Path(path)
    if not target.exists():
        raise InputFileError("file not found", path=str(target),
                             hint="check the name and folder")
    if target.is_dir():
        raise InputFileError("this is a folder, not a FITS file",
                             path=str(target))
    return target


def _open(path: Path) -> fits.HDUList:
    """Open a FITS file with memory mapping; raise ours on any fault."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(80)
    except OSError as exc:
        raise InputFileError(f"cannot read the file ({exc.strerror})",
                             path=str(path)) from exc
    if not head.startswith(b"SIMPLE  ="):
        raise InputFileError("not a FITS file (no SIMPLE card at the start)",
                             path=str(path))
    _scan_structure(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # raw integers stay raw: scaled data are converted in chunks
            hdul = fits.open(path, memmap=True, mode="readonly",
                             lazy_load_hdus=False,
                             do_not_scale_image_data=True)
    except Exception as exc:  # astropy raises OSError, ValueError, ...
        _close_leaked(exc)
        raise InputFileError(f"not a readable FITS file ({exc})",
                             path=str(path)) from exc
    size = path.stat().st_size
    for index, hdu in enumerate(hdul):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                info = hdul.fileinfo(index)
                needed = (None if info is None else
                          info["datLoc"] + _raw_nbytes(hdu.header))
        except Exception as exc:  # an unparsable card, a bad NAXISn ...
            hdul.close()
            raise InputFileError(f"invalid FITS header ({exc})",
                                 path=str(path), hdu=index,
                                 hint="the header breaks the FITS standard; "
                                      "check it with astropy's fitsinfo"
                                 ) from exc
        if needed is not None and needed > size:
            hdul.close()
            raise InputFileError(
                f"truncated file: HDU {index} needs {needed} bytes but the "
                f"file has {size}", path=str(path), hdu=index,
                hint="the download or copy was incomplete")
    return hdul


_BITPIX_VALUES = (8, 16, 32, 64, -32, -64)
_MAX_HEADER_BLOCKS = 2000  # 72 000 cards: far beyond any real header


def _card_int(cards: dict[str, bytes], key: str, path: Path, index: int,
              default: int | None = None) -> int:
    raw = cards.get(key)
    if raw is None:
        if default is None:
            raise InputFileError(f"mandatory keyword {key} is missing",
                                 path=str(path), hdu=index, keyword=key,
                                 hint="the header breaks the FITS standard")
        return default
    text = raw.split(b"/", 1)[0].strip()
    try:
        return int(text.decode("ascii"))
    except (UnicodeDecodeError, ValueError):
        raise InputFileError(f"{key} is not an integer "
                             f"({text.decode('latin-1')!r})", path=str(path),
                             hdu=index, keyword=key,
                             hint="the header breaks the FITS standard"
                             ) from None


def _scan_structure(path: Path) -> None:
    """Check every HDU's structural keywords before astropy parses the file.

    FITS Standard 4.0 (Sect. 4.4.1): BITPIX is one of 8, 16, 32, 64, -32,
    -64; 0 <= NAXIS <= 999; every NAXISn >= 0; PCOUNT >= 0 and GCOUNT >= 1;
    the data take |BITPIX|/8 GCOUNT (PCOUNT + NAXIS1 ... NAXISm) bytes
    after the header (Sect. 4.4.1.1, eq. 2). Headers are read as raw
    2880-byte blocks, so absurd values (NAXIS = 10^8, GCOUNT < 0) are
    refused with a message naming the keyword instead of reaching code
    that would loop or allocate for them; data reaching beyond the end of
    the file mean a truncated file. Blocks after an HDU that do not start
    an extension are skipped, as astropy skips them, so that any later
    extension header is checked too.
    """
    size = path.stat().st_size
    offset = index = 0
    with open(path, "rb") as handle:
        while offset < size:
            handle.seek(offset)
            cards: dict[str, bytes] = {}
            blocks = 0
            ended = False
            while not ended:
                block = handle.read(2880)
                if blocks == 0 and index > 0 and not block.startswith(b"XTENSION"):
                    break  # not an extension: look in the next block
                if len(block) < 2880:
                    raise InputFileError(
                        f"truncated file: the header of HDU {index} is cut "
                        "short (no END card)", path=str(path), hdu=index,
                        hint="the download or copy was incomplete")
                blocks += 1
                for k in range(0, 2880, 80):
                    card = block[k:k + 80]
                    key = card[:8].decode("ascii", "replace").strip()
                    if key == "END":
                        ended = True
                        break
                    if key in ("SIMPLE", "XTENSION") and (blocks, k) != (1, 0):
                        raise InputFileError(
                            f"the header of HDU {index} has no END card "
                            "before the next header", path=str(path),
                            hdu=index, keyword="END")
                    if card[8:10] == b"= " and key not in cards:
                        cards[key] = card[10:]
                if blocks > _MAX_HEADER_BLOCKS:
                    raise InputFileError(f"the header of HDU {index} has no "
                                         "END card", path=str(path), hdu=index)
            if not ended:
                # bytes that are no header (astropy skips them, looking for
                # a later XTENSION block): check whatever it would find
                offset += 2880
                continue
            bitpix = _card_int(cards, "BITPIX", path, index)
            if bitpix not in _BITPIX_VALUES:
                raise InputFileError(
                    f"BITPIX = {bitpix} is not a FITS data type (8, 16, 32, "
                    "64, -32 or -64)", path=str(path), hdu=index,
                    keyword="BITPIX")
            naxis = _card_int(cards, "NAXIS", path, index)
            if not 0 <= naxis <= 999:
                raise InputFileError(f"NAXIS = {naxis} is outside 0-999",
                                     path=str(path), hdu=index, keyword="NAXIS")
            lengths = [_card_int(cards, f"NAXIS{a}", path, index)
                       for a in range(1, naxis + 1)]
            for a, n in enumerate(lengths, start=1):
                if n < 0:
                    raise InputFileError(f"NAXIS{a} = {n} is negative",
                                         path=str(path), hdu=index,
                                         keyword=f"NAXIS{a}")
            pcount = _card_int(cards, "PCOUNT", path, index, 0)
            gcount = _card_int(cards, "GCOUNT", path, index, 1)
            if pcount < 0 or gcount < 1:
                raise InputFileError(
                    f"PCOUNT = {pcount} / GCOUNT = {gcount} are invalid "
                    "(PCOUNT >= 0, GCOUNT >= 1)", path=str(path), hdu=index,
                    keyword="PCOUNT/GCOUNT")
            if naxis == 0:
                nbytes = 0
            else:
                groups = lengths[0] == 0 and cards.get("GROUPS", b"").strip()[:1] == b"T"
                count = math.prod(lengths[1:] if groups else lengths)
                nbytes = abs(bitpix) // 8 * gcount * (pcount + count)
            data_start = offset + 2880 * blocks
            if data_start + nbytes > size:
                raise InputFileError(
                    f"truncated file: HDU {index} needs {data_start + nbytes} "
                    f"bytes but the file has {size}", path=str(path),
                    hdu=index, hint="the download or copy was incomplete")
            offset = data_start + -(-nbytes // 2880) * 2880
            index += 1


def _close_leaked(exc: BaseException) -> None:
    """Close the file astropy leaves open when :func:`fits.open` fails part
    way (the half-built HDU list sits in the frames of the traceback);
    otherwise it is closed only by the garbage collector, with a
    ResourceWarning."""
    from astropy.io.fits.file import _File

    tb = exc.__traceback__
    while tb is not None:
        for value in list(tb.tb_frame.f_locals.values()):
            if isinstance(value, (fits.HDUList, _File)):
                try:
                    value.close()
                except Exception:  # noqa: BLE001 - best effort only
                    pass
        tb = tb.tb_next


def _raw_nbytes(header: fits.Header) -> int:
    naxis = int(header.get("NAXIS", 0))
    if naxis == 0:
        return 0
    count = 1
    for axis in range(1, naxis + 1):
        count *= int(header.get(f"NAXIS{axis}", 0))
    count = abs(int(header.get("BITPIX", 8))) // 8 * (
        int(header.get("GCOUNT", 1)) * (int(header.get("PCOUNT", 0)) + count))
    return count


def _hdu_label(hdul: fits.HDUList, index: int) -> str:
    name = hdul[index].name
    return name if name and name != "PRIMARY" else str(index)


def _make_wcs(header: fits.Header, path: Path, hdu: str) -> WCS:
    """Build a WCS from a header, silencing harmless header fixes."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FITSFixedWarning)
            return WCS(header)
    except Exception as exc:
        zero = [f"CDELT{a}" for a in range(1, int(header.get("NAXIS", 0)) + 1)
                if _is_zero(header.get(f"CDELT{a}"))]
        if zero:
            spectral = [k for k in zero if str(header.get(
                "CTYPE" + k[5:], "")).strip().upper()[:4] in _SPECTRAL_TYPES]
            cls = SpectralAxisError if spectral else HeaderError
            what = ("zero-width channels" if spectral else
                    "zero-size pixels")
            raise cls(f"{what}: {', '.join(k + ' = 0' for k in zero)}; the "
                      "WCS matrix is singular", path=str(path), hdu=hdu,
                      keyword=zero[0],
                      hint="set the channel width / pixel size") from exc
        text = str(exc).strip().splitlines()
        detail = text[-1] if text else type(exc).__name__
        if "singular" in str(exc).lower():
            raise HeaderError("invalid WCS: the linear transformation matrix "
                              f"(PC/CD/CDELT) is singular ({detail})",
                              path=str(path), hdu=hdu,
                              keyword="PCi_j/CDi_j/CDELTi") from exc
        raise HeaderError(f"invalid WCS ({detail})", path=str(path),
                          hdu=hdu) from exc


def _is_zero(value: Any) -> bool:
    try:
        return value is not None and float(value) == 0.0
    except (TypeError, ValueError):
        return False


def _check_celestial(celestial: WCS, path: Path, hdu: str) -> WCS:
    """Refuse a celestial WCS whose pixel-to-sky matrix is singular or not
    finite (pixels would have no area on the sky)."""
    try:
        matrix = np.asarray(celestial.pixel_scale_matrix, dtype=float)
        det = float(np.linalg.det(matrix))
        scale = float(np.max(np.abs(matrix)))
    except Exception as exc:
        raise HeaderError(f"invalid celestial WCS ({exc})", path=str(path),
                          hdu=hdu) from exc
    if not (np.isfinite(det) and np.isfinite(scale)) or scale == 0 or \
            abs(det) <= 1e-10 * scale * scale:
        raise HeaderError("the celestial WCS matrix (CDELT/PC/CD) is singular: "
                          "pixels have no area on the sky", path=str(path),
                          hdu=hdu, keyword="PCi_j/CDi_j/CDELTi", value=det,
                          hint="fix the PC or CD matrix of the RA/Dec axes")
    return celestial


def _read_array(hdu: Any, path: Path, label: str,
                cancel: CancelFlag | None = None) -> np.ndarray:
    """Return the HDU data as a memory map, or as float32 read in chunks.

    Unscaled float or integer data come back as the (read-only) memory map.
    Scaled data (BSCALE/BZERO) and BLANK values are converted channel block
    by channel block into a float32 array, never through float64 whole.
    """
    header = hdu.header
    for key in ("BSCALE", "BZERO"):
        if key in header and _header_number(header, key) is None:
            raise HeaderError(f"{key} is not a finite number",
                              path=str(path), hdu=label, keyword=key,
                              value=str(header[key]))
    scaled = ("BSCALE" in header and float(header["BSCALE"]) != 1.0) or (
        "BZERO" in header and float(header["BZERO"]) != 0.0)
    blank = header.get("BLANK") if int(header.get("BITPIX", -32)) > 0 else None
    if blank is not None and (isinstance(blank, bool)
                              or not isinstance(blank, int)):
        raise HeaderError("BLANK must be an integer", path=str(path),
                          hdu=label, keyword="BLANK", value=str(blank))
    try:
        raw = hdu.data  # raw values: the file is opened without scaling
    except Exception as exc:
        raise InputFileError(f"cannot read the data ({exc})", path=str(path),
                             hdu=label) from exc
    if raw is None:
        raise DataContentError("the HDU has no data", path=str(path),
                               hdu=label)
    if not scaled and blank is None:
        return raw
    bscale = float(header.get("BSCALE", 1.0))
    bzero = float(header.get("BZERO", 0.0))
    out = np.empty(raw.shape, dtype=np.float32)
    step = max(1, _CHUNK_BYTES // max(1, raw[0].nbytes)) if raw.ndim else 1
    for start in range(0, raw.shape[0] if raw.ndim else 1, step):
        check_cancel(cancel, "reading scaled data")
        block = np.asarray(raw[start:start + step])
        values = block.astype(np.float64) * bscale + bzero
        if blank is not None:
            values[block == int(blank)] = np.nan
        out[start:start + step] = values
    out.flags.writeable = False
    return out


def _parse_unit(text: str) -> u.UnitBase | None:
    """Parse a BUNIT-like string leniently; None if it cannot be parsed."""
    text = (text or "").strip()
    if not text:
        return None
    candidates = [text, text.lower(), text.replace("KM/S", "km/s"),
                  text.lower().replace("sec", "s")]
    for candidate in candidates:
        for fmt in ("fits", "generic"):
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    return u.Unit(candidate, format=fmt)
            except Exception:
                continue
    return None


# --------------------------------------------------------------------------
# cube reading
# --------------------------------------------------------------------------

def _significant_axes(header: fits.Header) -> list[int]:
    naxis = int(header.get("NAXIS", 0))
    return [a for a in range(1, naxis + 1) if int(header.get(f"NAXIS{a}", 1)) > 1]


def _find_cube_hdu(hdul: fits.HDUList, path: Path, hdu: int | str | None) -> int:
    if hdu is not None:
        try:
            index = hdul.index_of(hdu)
        except (KeyError, IndexError) as exc:
            raise InputFileError(f"no HDU named {hdu!r}", path=str(path),
                                 hint="list the HDUs with astropy's fitsinfo"
                                 ) from exc
        return index
    candidates = [i for i, h in enumerate(hdul)
                  if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU))
                  and int(h.header.get("NAXIS", 0)) >= 3
                  and len(_significant_axes(h.header)) >= 3]
    if not candidates:
        dims = [int(h.header.get("NAXIS", 0)) for h in hdul
                if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU))]
        raise DataContentError(
            f"no 3D cube found (image HDUs have {max(dims) if dims else 0} "
            "dimension(s))", path=str(path),
            hint="a cube with a spectral axis is needed here; load 2D maps "
                 "as a map set instead")
    for i in candidates:
        if hdul[i].name.upper() in _DATA_EXT_NAMES or i == 0:
            return i
    return candidates[0]


def _find_error_hdu(hdul: fits.HDUList, data_index: int,
                    error_hdu: int | str | None, path: Path
                    ) -> tuple[int | None, str]:
    """Return (index, kind) of the uncertainty HDU; kind var|ivar|err."""
    def kind_of(name: str) -> str | None:
        name = name.upper()
        if name in _VARIANCE_NAMES:
            return "var"
        if name in _IVAR_NAMES:
            return "ivar"
        if name in _ERROR_NAMES:
            return "err"
        return None

    if error_hdu is not None:
        try:
            index = hdul.index_of(error_hdu)
        except (KeyError, IndexError) as exc:
            raise InputFileError(f"no HDU named {error_hdu!r}",
                                 path=str(path)) from exc
        return index, kind_of(hdul[index].name) or "var"
    shape = hdul[data_index].shape
    for index, h in enumerate(hdul):
        if index == data_index or not isinstance(h, (fits.ImageHDU,
                                                     fits.PrimaryHDU)):
            continue
        kind = kind_of(h.name)
        if kind is not None and h.shape == shape:
            return index, kind
    return None, ""


def _variance_from(raw: np.ndarray, kind: str,
                   cancel: CancelFlag | None) -> np.ndarray:
    if kind == "var":
        return raw
    out = np.empty(raw.shape, dtype=np.float32)
    step = max(1, _CHUNK_BYTES // max(1, raw[0].nbytes))
    for start in range(0, raw.shape[0], step):
        check_cancel(cancel, "reading uncertainties")
        block = np.asarray(raw[start:start + step], dtype=np.float64)
        if kind == "ivar":
            with np.errstate(divide="ignore", invalid="ignore"):
                block = np.where(block > 0, 1.0 / block, np.nan)
        else:
            block = block * block
        out[start:start + step] = block
    out.flags.writeable = False
    return out


def _spectral_from_wcs(wcs: WCS, header: fits.Header, n_channels: int,
                       spec: int, path: Path, label: str) -> SpectralAxis:
    ctype = wcs.wcs.ctype[spec].strip().upper()
    family = ctype[:4]
    if family not in _SPECTRAL_TYPES:
        raise SpectralAxisError(f"unknown spectral axis type CTYPE{spec + 1}"
                                f"={ctype!r}", path=str(path), hdu=label,
                                keyword=f"CTYPE{spec + 1}",
                                hint="use a FITS spectral type such as FREQ, "
                                     "WAVE, AWAV, VRAD, VOPT or VELO")
    try:
        sub = wcs.sub([spec + 1])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FITSFixedWarning)
            values = sub.wcs_pix2world(np.arange(n_channels, dtype=float), 0)[0]
        unit = u.Unit(wcs.wcs.cunit[spec] or _PREFERRED_UNIT[family])
        target = _PREFERRED_UNIT[family]
        values = (values * unit).to_value(target)
    except Exception as exc:
        raise SpectralAxisError(f"cannot evaluate the spectral axis ({exc})",
                                path=str(path), hdu=label,
                                keyword=f"CTYPE{spec + 1}") from exc
    if not np.all(np.isfinite(values)):
        raise SpectralAxisError(
            "the spectral axis gives non-finite values", path=str(path),
            hdu=label, keyword=f"CTYPE{spec + 1}",
            hint="velocity axes of some types need both RESTFRQ and RESTWAV")
    rest_value, rest_unit = None, ""
    restfrq = float(wcs.wcs.restfrq or 0.0)
    restwav = float(wcs.wcs.restwav or 0.0)
    restfrq = restfrq if np.isfinite(restfrq) else 0.0
    restwav = restwav if np.isfinite(restwav) else 0.0
    if not restfrq:
        restfrq = _header_number(header, "RESTFREQ", 0.0)
    if not restwav:
        restwav = _header_number(header, "RESTWAVE", 0.0)
    wavelength_like = family in ("WAVE", "AWAV", "VOPT", "ZOPT")
    if restwav > 0 and (wavelength_like or restfrq <= 0):
        rest_value, rest_unit = restwav * 1e10, "Angstrom"  # RESTWAV is in m
    elif restfrq > 0:
        rest_value, rest_unit = restfrq, "Hz"
    specsys = str(header.get("SPECSYS", "") or wcs.wcs.specsys or "").strip()
    return SpectralAxis(ctype=ctype if "-" in ctype else family,
                        values=values, unit=target.to_string(),
                        rest_value=rest_value, rest_unit=rest_unit,
                        convention=_SPECTRAL_TYPES[family],
                        air=(family == "AWAV"), specsys=specsys)


def _header_number(header: Any, key: str,
                   default: float | None = None) -> float | None:
    """A header value as a finite float; ``default`` when it is absent,
    not a number (e.g. a string) or not finite."""
    try:
        value = header.get(key, None)
    except Exception:  # noqa: BLE001 - an unparsable card
        return default
    if value is None or isinstance(value, bool):
        return default
    try:
        number = float(value)
    except (TypeError, ValueError):
        return default
    return number if np.isfinite(number) else default


def _psf_arcsec(header: Any, *more: Any) -> float | None:
    """PSF FWHM (arcsec) from BMAJ (deg) or PSF_FWHM-like keywords of
    headers or plain keyword mappings; None if none is usable."""
    for h in (header, *more):
        if h is None:
            continue
        bmaj = _header_number(h, "BMAJ")
        if bmaj is not None and bmaj > 0:
            return bmaj * 3600.0  # BMAJ is in degrees
        for key in ("PSF_FWHM", "PSFFWHM", "SEEING", "FWHM"):
            value = _header_number(h, key)
            if value is not None and value > 0:
                return value
    return None


def _check_not_empty(data: np.ndarray, path: Path, label: str) -> None:
    """Raise if the data are empty or entirely NaN (stops at the first
    finite block, so normal cubes cost one small read)."""
    if data.size == 0:
        raise DataContentError("the data array is empty", path=str(path),
                               hdu=label)
    step = max(1, _CHUNK_BYTES // 4 // max(1, int(np.prod(data.shape[1:]))))
    for start in range(0, data.shape[0], step):
        block = np.asarray(data[start:start + step])
        if block.dtype.kind != "f" or np.isfinite(block).any():
            return
    raise DataContentError("the data are all NaN or infinite (no valid "
                           "pixel)",
                           path=str(path), hdu=label)


def load_cube(path: str | os.PathLike, *, hdu: int | str | None = None,
              error_hdu: int | str | None = None,
              progress: ProgressCallback | None = None,
              cancel: CancelFlag | None = None) -> Cube:
    """Load a spectral cube from a FITS file.

    Parameters
    ----------
    path : path-like
        The FITS file.
    hdu : int or str, optional
        Data HDU; by default the primary HDU if it is 3D, else the first 3D
        image extension named DATA, SCI, FLUX, CUBE..., else the first 3D
        image extension.
    error_hdu : int or str, optional
        Uncertainty HDU; by default an extension named STAT/VAR/VARIANCE
        (variance), IVAR (inverse variance) or ERR/ERROR/NOISE/SIGMA
        (standard deviation) with the data's shape. Stored as variance.
    progress, cancel
        See :mod:`gyrometer.core.progress` (checksum and scaled reads).

    Returns
    -------
    Cube
        Data in numpy order ``(channel, y, x)`` as a read-only memory map
        where possible.

    Raises
    ------
    InputFileError
        Missing, not FITS, truncated.
    DataContentError
        Not 3D, empty, all NaN.
    HeaderError, SpectralAxisError
        No celestial WCS; no or unknown spectral axis.
    """
    path = _check_path(path)
    hdul = _open(path)
    try:
        return _load_cube(hdul, path, hdu, error_hdu, progress, cancel)
    finally:
        hdul.close()  # memory-mapped arrays stay valid after closing


def _load_cube(hdul: fits.HDUList, path: Path, hdu: int | str | None,
               error_hdu: int | str | None,
               progress: ProgressCallback | None,
               cancel: CancelFlag | None) -> Cube:
    index = _find_cube_hdu(hdul, path, hdu)
    label = _hdu_label(hdul, index)
    data_hdu = hdul[index]
    header = data_hdu.header
    primary = hdul[0].header if index != 0 else None
    if len(_significant_axes(header)) < 3:
        raise DataContentError(
            f"HDU has {len(_significant_axes(header))} non-degenerate "
            "dimension(s); a 3D cube is needed", path=str(path), hdu=label,
            hint="load 2D maps as a map set")
    wcs = _make_wcs(header, path, label)
    naxis = wcs.naxis
    lng, lat, spec = wcs.wcs.lng, wcs.wcs.lat, wcs.wcs.spec
    if lng < 0 or lat < 0:
        raise HeaderError("no celestial WCS (CTYPE of RA/DEC or GLON/GLAT "
                          "axes missing)", path=str(path), hdu=label,
                          keyword="CTYPE1/CTYPE2",
                          hint="the sky position of each pixel is needed")
    if spec < 0:
        others = [a for a in range(naxis) if a not in (lng, lat)
                  and int(header.get(f"NAXIS{a + 1}", 1)) > 1]
        names = [wcs.wcs.ctype[a].strip() for a in others]
        if not others or not any(names) or all(
                n.upper() in ("LINEAR", "STOKES", "PIXEL") for n in names):
            raise SpectralAxisError("no spectral axis", path=str(path),
                                    hdu=label, keyword=f"CTYPE{others[0] + 1}"
                                    if others else None,
                                    hint="add a spectral CTYPE (e.g. AWAV, "
                                         "FREQ, VRAD) with CRVAL/CDELT/CRPIX")
        raise SpectralAxisError(f"unknown spectral axis type {names[0]!r}",
                                path=str(path), hdu=label,
                                keyword=f"CTYPE{others[0] + 1}",
                                hint="use a FITS spectral type such as FREQ, "
                                     "WAVE, AWAV, VRAD, VOPT or VELO")
    extra = [a for a in range(naxis) if a not in (lng, lat, spec)]
    for a in extra:
        if int(header.get(f"NAXIS{a + 1}", 1)) > 1:
            raise DataContentError(
                f"axis {a + 1} ({wcs.wcs.ctype[a].strip() or 'unnamed'}) has "
                f"{header[f'NAXIS{a + 1}']} planes; only degenerate extra "
                "axes can be dropped", path=str(path), hdu=label,
                hint="extract one Stokes plane first")
    raw = _read_array(data_hdu, path, label, cancel)
    data = _to_spec_y_x(raw, naxis, lng, lat, spec)
    n_channels = data.shape[0]
    spectral = _spectral_from_wcs(wcs, header if primary is None else
                                  _merged(primary, header), n_channels,
                                  spec, path, label)
    _check_not_empty(data, path, label)
    celestial = _check_celestial(wcs.sub([lng + 1, lat + 1]), path, label)
    variance = None
    err_index, kind = _find_error_hdu(hdul, index, error_hdu, path)
    if err_index is not None:
        err_label = _hdu_label(hdul, err_index)
        err_raw = _read_array(hdul[err_index], path, err_label, cancel)
        if err_raw.shape != raw.shape:
            raise MapMismatchError(
                f"uncertainty HDU {err_label} has shape {err_raw.shape}, "
                f"data have {raw.shape}", path=str(path), hdu=err_label)
        variance = _to_spec_y_x(_variance_from(err_raw, kind, cancel), naxis,
                                lng, lat, spec)
    name = str(header.get("OBJECT", "") or (primary or {}).get("OBJECT", "")
               or path.stem).strip()
    report(progress, 0, 1, "checksum")
    checksum = file_sha256(path)
    report(progress, 1, 1, "checksum")
    bunit = str(header.get("BUNIT", "") or (primary or {}).get("BUNIT", "")
                ).strip()
    return Cube(data=data, wcs=celestial, spectral=spectral, unit=bunit,
                provenance=Provenance(str(path.resolve()), label, checksum),
                variance=variance, name=name,
                psf_fwhm_arcsec=_psf_arcsec(header, primary))


def _merged(primary: fits.Header, header: fits.Header) -> fits.Header:
    """Extension header with primary keywords it lacks (SPECSYS, RESTFRQ)."""
    merged = header.copy()
    for key in ("SPECSYS", "RESTFRQ", "RESTFREQ", "RESTWAV", "RESTWAVE"):
        if key not in merged and key in primary:
            merged[key] = primary[key]
    return merged


def _to_spec_y_x(array: np.ndarray, naxis: int, lng: int, lat: int,
                 spec: int) -> np.ndarray:
    """Drop degenerate axes and order numpy axes as (spec, lat, lng).

    FITS axis ``k`` (0-based) is numpy axis ``naxis - 1 - k``.
    """
    index = [0] * naxis
    for k in (lng, lat, spec):
        index[naxis - 1 - k] = slice(None)
    view = array[tuple(index)]
    # remaining numpy axes are the kept FITS axes in decreasing FITS order
    kept = sorted((lng, lat, spec), reverse=True)
    order = [kept.index(k) for k in (spec, lat, lng)]
    return np.transpose(view, order) if order != [0, 1, 2] else view


# --------------------------------------------------------------------------
# map reading
# --------------------------------------------------------------------------

def read_image(path: str | os.PathLike, hdu: int | str | None = None
               ) -> tuple[np.ndarray, WCS, fits.Header, str]:
    """Read one 2D image (degenerate axes dropped) with its celestial WCS.

    Returns ``(array float64, celestial WCS, header, hdu label)``.
    """
    path = _check_path(path)
    with _open(path) as hdul:
        return _read_image(hdul, path, hdu)


def _read_image(hdul: fits.HDUList, path: Path, hdu: int | str | None
                ) -> tuple[np.ndarray, WCS, fits.Header, str]:
    if hdu is None:
        found = [i for i, h in enumerate(hdul)
                 if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU))
                 and h.header.get("NAXIS", 0) >= 2
                 and len(_significant_axes(h.header)) >= 2]
        if not found:
            raise DataContentError("no 2D image found", path=str(path))
        index = found[0]
    else:
        try:
            index = hdul.index_of(hdu)
        except (KeyError, IndexError) as exc:
            raise InputFileError(f"no HDU named {hdu!r}", path=str(path)
                                 ) from exc
    return _image_from_hdu(hdul, index, path)


def _image_from_hdu(hdul: fits.HDUList, index: int, path: Path
                    ) -> tuple[np.ndarray, WCS, fits.Header, str]:
    label = _hdu_label(hdul, index)
    header = hdul[index].header
    significant = _significant_axes(header)
    if len(significant) != 2:
        raise DataContentError(
            f"HDU has {len(significant)} non-degenerate dimension(s); a 2D "
            "map is needed", path=str(path), hdu=label)
    wcs = _make_wcs(header, path, label)
    lng, lat = wcs.wcs.lng, wcs.wcs.lat
    if lng < 0 or lat < 0:
        raise HeaderError("no celestial WCS (CTYPE of RA/DEC or GLON/GLAT "
                          "axes missing)", path=str(path), hdu=label,
                          keyword="CTYPE1/CTYPE2",
                          hint="the sky position of each pixel is needed")
    raw = _read_array(hdul[index], path, label)
    naxis = wcs.naxis
    idx = [0] * naxis
    for k in (lng, lat):
        idx[naxis - 1 - k] = slice(None)
    image = np.asarray(raw[tuple(idx)], dtype=np.float64)
    if lng > lat:  # numpy axes are (lng, lat): transpose to (lat, lng)
        image = image.T
    image = np.array(image)  # own the memory (detach from the memory map)
    if image.size == 0:
        raise DataContentError("the map is empty", path=str(path), hdu=label)
    if not np.isfinite(image).any():
        raise DataContentError("the map is all NaN or infinite (no valid "
                               "pixel)",
                               path=str(path), hdu=label)
    return (image, _check_celestial(wcs.sub([lng + 1, lat + 1]), path, label),
            header, label)


def _role_of(name: str) -> tuple[str | None, bool]:
    name = name.upper().strip()
    for role, names in _ROLE_NAMES.items():
        if name in names:
            return role, False
    for role, names in _ROLE_IVAR_NAMES.items():
        if name in names:
            return role, True
    return None, False


def _velocity_scale(header: fits.Header, path: Path, label: str,
                    override: str | None, role: str) -> float:
    """Factor turning the map into km/s; UnitError if not a velocity."""
    text = override if override is not None else str(header.get("BUNIT", ""))
    if not text.strip():
        warnings.warn(DataQualityWarning(
            f"{path}: HDU {label}: {role} map has no BUNIT; assuming km/s"),
            stacklevel=3)
        return 1.0
    unit = _parse_unit(text)
    if unit is None or unit.physical_type != "speed":
        raise UnitError(f"the {role} map's unit {text!r} is not a velocity",
                        path=str(path), hdu=label, keyword="BUNIT",
                        value=text, hint="set BUNIT to 'km/s' or 'm/s', or "
                                         "pass velocity_unit")
    return float(unit.to(u.km / u.s))


def _same_grid(wcs_a: WCS, shape_a: tuple, wcs_b: WCS, shape_b: tuple
               ) -> bool:
    if tuple(shape_a) != tuple(shape_b):
        return False
    ny, nx = shape_a
    px = np.array([0, nx - 1, 0, nx - 1, (nx - 1) / 2], dtype=float)
    py = np.array([0, 0, ny - 1, ny - 1, (ny - 1) / 2], dtype=float)
    try:
        a = wcs_a.pixel_to_world(px, py)
        b = wcs_b.pixel_to_world(px, py)
        sep = a.separation(b).to_value(u.arcsec)
    except Exception:
        return False
    scale = np.sqrt(abs(np.linalg.det(wcs_a.pixel_scale_matrix))) * 3600.0
    return bool(np.all(sep <= 0.01 * scale))


def _read_mef_maps(hdul: fits.HDUList, mef: Path, maps: dict) -> dict:
    """Fill ``maps`` from the named extensions; return primary keywords."""
    meta = dict(hdul[0].header)
    for index, h in enumerate(hdul):
        if not isinstance(h, (fits.PrimaryHDU, fits.ImageHDU)):
            continue
        role, ivar = _role_of(h.name)
        if role is None or role in maps:
            continue
        image, wcs, header, label = _image_from_hdu(hdul, index, mef)
        if ivar:
            with np.errstate(divide="ignore", invalid="ignore"):
                image = np.where(image > 0, 1.0 / np.sqrt(image), np.nan)
        maps[role] = (image, wcs, header, label, mef)
    if not maps:
        image_hdus = [i for i, h in enumerate(hdul)
                      if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU))
                      and len(_significant_axes(h.header)) >= 2]
        if image_hdus and len(_significant_axes(
                hdul[image_hdus[0]].header)) >= 3:
            raise DataContentError(
                "this is a cube, not a map set", path=str(mef),
                hint="compute moment maps from it first")
        raise DataContentError(
            "no map extension recognised (expected INTENSITY/FLUX and "
            "VELOCITY/VEL ...)", path=str(mef),
            hint="name the extensions or give one file per map")
    return meta


def load_mapset(path: str | os.PathLike | None = None, *,
                intensity: str | os.PathLike | None = None,
                velocity: str | os.PathLike | None = None,
                intensity_err: str | os.PathLike | None = None,
                velocity_err: str | os.PathLike | None = None,
                dispersion: str | os.PathLike | None = None,
                dispersion_err: str | os.PathLike | None = None,
                tracer: str | None = None,
                velocity_unit: str | None = None,
                intensity_image: str | os.PathLike | None = None) -> MapSet:
    """Load co-registered maps of one tracer.

    Parameters
    ----------
    path : path-like, optional
        A multi-extension FITS file with named map extensions: Gyrometer's
        layout (INTENSITY, INTENSITY_ERR, VELOCITY, VELOCITY_ERR, DISPERSION,
        DISPERSION_ERR) or common synonyms (FLUX, MOM0, VEL, V, MOM1,
        SIGMA, MOM2, VEL_ERR, VEL_IVAR ...).
    intensity, velocity, intensity_err, velocity_err, dispersion, \
dispersion_err : path-like, optional
        One single-map file per role; these override maps from ``path``.
    tracer : str, optional
        One of :data:`~gyrometer.core.dataset.TRACERS`; default the TRACER
        keyword or ``"other"``.
    velocity_unit : str, optional
        Unit of the velocity and dispersion maps when BUNIT is missing or
        wrong (e.g. ``"m/s"``).
    intensity_image : path-like, optional
        A separate surface-brightness image (e.g. broad-band) to use as the
        intensity; it is resampled onto the velocity map's grid with
        :func:`~gyrometer.core.regrid.regrid_image` (bilinear, surface
        brightness preserved).

    Raises
    ------
    MapMismatchError
        Shapes or WCS of two maps disagree (both files named).
    UnitError
        A velocity map's unit is not a velocity.
    """
    maps: dict[str, tuple[np.ndarray, WCS, fits.Header, str, Path]] = {}
    meta: dict[str, Any] = {}
    provenance: list[Provenance] = []
    checksums: dict[Path, str] = {}

    def checksum(p: Path) -> str:
        if p not in checksums:
            checksums[p] = file_sha256(p)
        return checksums[p]

    if path is not None:
        mef = _check_path(path)
        with _open(mef) as hdul:
            meta = _read_mef_maps(hdul, mef, maps)
    for role, given in (("intensity", intensity), ("velocity", velocity),
                        ("intensity_err", intensity_err),
                        ("velocity_err", velocity_err),
                        ("dispersion", dispersion),
                        ("dispersion_err", dispersion_err)):
        if given is not None:
            image, wcs, header, label = read_image(given)
            maps[role] = (image, wcs, header, label, Path(given))
            if not meta:
                meta = dict(header)
    if "velocity" not in maps:
        raise DataContentError("no velocity map given or found",
                               path=None if path is None else str(path),
                               hint="a velocity map is required")
    ref = maps["velocity"]
    if intensity_image is not None:
        from .regrid import regrid_image
        image, wcs, header, label = read_image(intensity_image)
        resampled = regrid_image(image, wcs, ref[1], ref[0].shape)
        maps["intensity"] = (resampled, ref[1], header, label,
                             Path(intensity_image))
    if "intensity" not in maps:
        raise DataContentError("no intensity map given or found",
                               path=None if path is None else str(path),
                               hint="the tracer's surface brightness is "
                                    "required (or give intensity_image)")
    for role, (image, wcs, _h, label, src) in maps.items():
        if not _same_grid(ref[1], ref[0].shape, wcs, image.shape):
            raise MapMismatchError(
                f"the {role} map ({src}, HDU {label}, shape {image.shape}) "
                f"and the velocity map ({ref[4]}, HDU {ref[3]}, shape "
                f"{ref[0].shape}) differ in shape or WCS",
                path=str(src), hint="resample them onto one grid first")
    arrays: dict[str, np.ndarray | None] = {}
    for role in _ROLE_NAMES:
        if role not in maps:
            arrays[role] = None
            continue
        image, _w, header, label, src = maps[role]
        if role.startswith(("velocity", "dispersion")):
            image = image * _velocity_scale(header, src, label,
                                            velocity_unit, role)
        arrays[role] = image
        provenance.append(Provenance(str(src.resolve()), label,
                                     checksum(src)))
    tracer_value = tracer or str(meta.get("TRACER", "") or "other")
    if tracer_value not in TRACERS:
        matches = [t for t in TRACERS if t.lower() == tracer_value.lower()]
        tracer_value = matches[0] if matches else "other"
    vconv = str(meta.get("VCONV", "") or "optical").strip().lower()
    if vconv not in _VCONV:
        vconv = "optical"
    name = str(meta.get("OBJECT", "") or "").strip() or ref[4].stem
    int_header = maps["intensity"][2]
    return MapSet(
        intensity=arrays["intensity"], velocity_kms=arrays["velocity"],
        wcs=ref[1], intensity_err=arrays["intensity_err"],
        velocity_err_kms=arrays["velocity_err"],
        dispersion_kms=arrays["dispersion"],
        dispersion_err_kms=arrays["dispersion_err"],
        intensity_unit=str(int_header.get("BUNIT", "")).strip(), name=name,
        tracer=tracer_value,
        psf_fwhm_arcsec=_psf_arcsec(meta or None, maps["intensity"][2]),
        velocity_convention=vconv,
        specsys=str(meta.get("SPECSYS", "") or "").strip(),
        provenance=tuple(provenance))


def open_data(path: str | os.PathLike) -> Cube | MapSet:
    """Load a file as a cube if it holds a 3D image, else as a map set."""
    target = _check_path(path)
    with _open(target) as hdul:
        is_cube = any(isinstance(h, (fits.PrimaryHDU, fits.ImageHDU))
                      and len(_significant_axes(h.header)) >= 3 for h in hdul)
    return load_cube(target) if is_cube else load_mapset(target)


# --------------------------------------------------------------------------
# writing
# --------------------------------------------------------------------------

def _celestial_cards(wcs: WCS) -> fits.Header:
    """A deterministic 2D celestial header (PC + CDELT form)."""
    w = WCS(naxis=2)
    w.wcs.ctype = list(wcs.wcs.ctype)[:2]
    w.wcs.cunit = list(wcs.wcs.cunit)[:2] if any(wcs.wcs.cunit) else ["deg", "deg"]
    w.wcs.crval = list(wcs.wcs.crval)[:2]
    w.wcs.crpix = list(wcs.wcs.crpix)[:2]
    w.wcs.cdelt = list(wcs.wcs.get_cdelt())[:2]
    w.wcs.pc = np.asarray(wcs.wcs.get_pc())[:2, :2]
    if wcs.wcs.radesys:
        w.wcs.radesys = wcs.wcs.radesys
    if np.isfinite(wcs.wcs.equinox):
        w.wcs.equinox = wcs.wcs.equinox
    w.wcs.lonpole = wcs.wcs.lonpole
    w.wcs.latpole = wcs.wcs.latpole
    return w


def _spectral_wcs_params(axis: SpectralAxis) -> tuple[str, str, float, float]:
    """(CTYPE, CUNIT, CRVAL, CDELT) with CRPIX = 1 for a linear or
    log-linear axis; OutputError otherwise."""
    values = np.asarray(axis.values, dtype=float)
    n = values.size
    unit = u.Unit(axis.unit) if axis.unit else u.dimensionless_unscaled
    cunit = {"km / s": "km/s"}.get(unit.to_string(), unit.to_string("fits")
                                   if unit != u.AA else "Angstrom")
    ctype = axis.ctype.upper()
    family = ctype[:4]
    if n == 1:
        return family, cunit, float(values[0]), 1.0
    index = np.arange(n)
    step = (values[-1] - values[0]) / (n - 1)
    if np.max(np.abs(values - (values[0] + step * index))) <= 1e-6 * abs(step):
        return family, cunit, float(values[0]), float(step)
    if np.all(values > 0):
        dln = np.log(values[-1] / values[0]) / (n - 1)
        model = values[0] * np.exp(dln * index)
        if np.max(np.abs(values - model)) <= 1e-6 * abs(values[0] * dln):
            # WCSLIB -LOG: x = CRVAL exp(CDELT (p - CRPIX) / CRVAL)
            return f"{family}-LOG", cunit, float(values[0]), float(values[0] * dln)
    raise OutputError("the spectral axis is neither linear nor logarithmic; "
                      "it cannot be written with CRVAL/CDELT")


def _cube_header(cube: Cube) -> fits.Header:
    celestial = _celestial_cards(cube.wcs)
    ctype, cunit, crval, cdelt = _spectral_wcs_params(cube.spectral)
    w = WCS(naxis=3)
    w.wcs.ctype = [*celestial.wcs.ctype, ctype]
    w.wcs.cunit = [*celestial.wcs.cunit, cunit]
    w.wcs.crval = [*celestial.wcs.crval, crval]
    w.wcs.crpix = [*celestial.wcs.crpix, 1.0]
    w.wcs.cdelt = [*celestial.wcs.cdelt, cdelt]
    pc = np.eye(3)
    pc[:2, :2] = celestial.wcs.pc
    w.wcs.pc = pc
    if celestial.wcs.radesys:
        w.wcs.radesys = celestial.wcs.radesys
    if np.isfinite(celestial.wcs.equinox):
        w.wcs.equinox = celestial.wcs.equinox
    w.wcs.lonpole = celestial.wcs.lonpole
    w.wcs.latpole = celestial.wcs.latpole
    axis = cube.spectral
    if axis.rest_value:
        rest = axis.rest_value * u.Unit(axis.rest_unit)
        w.wcs.restfrq = rest.to_value(u.Hz, equivalencies=u.spectral())
        w.wcs.restwav = rest.to_value(u.m, equivalencies=u.spectral())
    if axis.specsys:
        w.wcs.specsys = axis.specsys
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        header = w.to_header()
    return _strip_dates(header)


def _strip_dates(header: fits.Header) -> fits.Header:
    for key in ("DATE", "DATE-OBS", "MJD-OBS", "DATEREF", "MJDREF",
                "MJDREFI", "MJDREFF"):
        if key in header:
            del header[key]
    return header


def _image_header(wcs: WCS, bunit: str, extname: str) -> fits.Header:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        header = _strip_dates(_celestial_cards(wcs).to_header())
    header["BUNIT"] = bunit
    header["EXTNAME"] = extname
    return header


def write_cube(path: str | os.PathLike, cube: Cube,
               overwrite: bool = False) -> Path:
    """Write a cube in Gyrometer's cube layout.

    Primary HDU: the data ``(channel, y, x)`` with a full 3D WCS (celestial
    axes 1-2 in PC + CDELT form, spectral axis 3 linear or ``-LOG``),
    BUNIT, OBJECT, RESTFRQ and RESTWAV (when a rest value is known; RESTWAV
    is a vacuum wavelength in m, Greisen et al. 2006), SPECSYS and
    PSF_FWHM (arcsec). Optional image extension ``VARIANCE`` (same shape).
    The output is byte-identical for identical input.
    """
    header = _cube_header(cube)
    primary = fits.PrimaryHDU(data=np.asarray(cube.data), header=header)
    primary.header["BUNIT"] = cube.unit
    primary.header["OBJECT"] = cube.name
    if cube.psf_fwhm_arcsec:
        primary.header["PSF_FWHM"] = (float(cube.psf_fwhm_arcsec),
                                      "[arcsec] spatial resolution FWHM")
    hdus = [primary]
    if cube.variance is not None:
        var_header = header.copy()
        var_header["BUNIT"] = f"({cube.unit})**2" if cube.unit else ""
        var_header["EXTNAME"] = "VARIANCE"
        hdus.append(fits.ImageHDU(data=np.asarray(cube.variance),
                                  header=var_header))
    _write_hdus(path, hdus, overwrite)
    return Path(path)


def write_mapset(path: str | os.PathLike, maps: MapSet,
                 overwrite: bool = False) -> Path:
    """Write a map set in Gyrometer's multi-extension layout.

    Empty primary HDU with OBJECT, TRACER, VCONV (velocity convention),
    SPECSYS and PSF_FWHM (arcsec); image extensions INTENSITY,
    INTENSITY_ERR, VELOCITY, VELOCITY_ERR, DISPERSION, DISPERSION_ERR
    (those present), each with the 2D celestial WCS and BUNIT (velocities
    in km/s). The output is byte-identical for identical input.
    """
    primary = fits.PrimaryHDU()
    primary.header["OBJECT"] = maps.name
    primary.header["TRACER"] = maps.tracer
    primary.header["VCONV"] = (maps.velocity_convention,
                               "velocity convention")
    primary.header["SPECSYS"] = maps.specsys
    if maps.psf_fwhm_arcsec:
        primary.header["PSF_FWHM"] = (float(maps.psf_fwhm_arcsec),
                                      "[arcsec] spatial resolution FWHM")
    hdus: list[Any] = [primary]
    for field_name, extname in MAP_EXTENSIONS.items():
        array = getattr(maps, field_name)
        if array is None:
            continue
        bunit = (maps.intensity_unit if field_name.startswith("intensity")
                 else "km/s")
        hdus.append(fits.ImageHDU(data=np.asarray(array),
                                  header=_image_header(maps.wcs, bunit,
                                                       extname)))
    _write_hdus(path, hdus, overwrite)
    return Path(path)


def _write_hdus(path: str | os.PathLike, hdus: list[Any],
                overwrite: bool) -> None:
    with atomic_output(path, overwrite=overwrite, suffix=".fits") as tmp:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", fits.verify.VerifyWarning)
                fits.HDUList(hdus).writeto(tmp, output_verify="fix",
                                           checksum=False)
        except OSError as exc:
            raise OutputError(f"cannot write the file ({exc})",
                              path=str(path)) from exc
