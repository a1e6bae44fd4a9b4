"""The project's exception and warning hierarchy.

Every fault a user can cause raises a subclass of :class:`GyrometerError`.
Each carries the offending file, HDU, keyword or value where one exists and a
hint that says what to do. The command line and the desktop app catch
:class:`GyrometerError` in one place each and show ``str(error)``; no user
fault ever reaches them as a traceback.
"""

from __future__ import annotations

__all__ = [
    "GyrometerError",
    "InputFileError",
    "HeaderError",
    "SpectralAxisError",
    "DataContentError",
    "MapMismatchError",
    "UnitError",
    "GeometryError",
    "SlitError",
    "FitError",
    "RotationCurveError",
    "RecipeError",
    "SessionError",
    "OutputError",
    "Cancelled",
    "GyrometerWarning",
    "GeometryWarning",
    "TracerWarning",
    "ConvergenceWarning",
    "DataQualityWarning",
]


class GyrometerError(Exception):
    """Base class of every error Gyrometer raises on purpose.

    Parameters
    ----------
    message : str
        What went wrong, in the user's terms.
    path : str, optional
        The file concerned.
    hdu : str or int, optional
        The FITS HDU (name or index) concerned.
    keyword : str, optional
        The header keyword, recipe key or setting concerned.
    value : object, optional
        The offending value.
    hint : str, optional
        What the user can do about it.
    """

    def __init__(self, message: str, *, path: str | None = None,
                 hdu: str | int | None = None, keyword: str | None = None,
                 value: object = None, hint: str | None = None) -> None:
        self.message = message
        self.path = None if path is None else str(path)
        self.hdu = hdu
        self.keyword = keyword
        self.value = value
        self.hint = hint
        super().__init__(self._compose())

    def _compose(self) -> str:
        where = []
        if self.path is not None:
            where.append(self.path)
        if self.hdu is not None:
            where.append(f"HDU {self.hdu}")
        if self.keyword is not None:
            where.append(f"{self.keyword}")
        text = (": ".join([", ".join(where), self.message]) if where
                else self.message)
        if self.hint:
            text += f" ({self.hint})"
        return text


class InputFileError(GyrometerError):
    """A file cannot be read at all: missing, not FITS, truncated, unreadable."""


class HeaderError(GyrometerError):
    """A FITS header lacks what is needed or holds an invalid WCS."""


class SpectralAxisError(HeaderError):
    """The spectral axis is missing, unknown or cannot be turned into velocity."""


class DataContentError(GyrometerError):
    """The data are unusable: wrong dimensionality, empty, all NaN."""


class MapMismatchError(GyrometerError):
    """Maps of one set disagree in shape or WCS."""


class UnitError(GyrometerError):
    """A quantity has the wrong physical type (e.g. not a velocity)."""


class GeometryError(GyrometerError):
    """A disk geometry is impossible or unusable (inclination, distance...)."""


class SlitError(GyrometerError):
    """A slit set is empty, off the data or otherwise unusable."""


class FitError(GyrometerError):
    """A fit could not be made (too few points, degenerate data)."""


class RotationCurveError(GyrometerError):
    """A rotation curve cannot be read, fitted or used."""


class RecipeError(GyrometerError):
    """A recipe file is invalid: wrong type, unknown key, missing file."""


class SessionError(GyrometerError):
    """A session file is invalid or of an unsupported schema version."""


class OutputError(GyrometerError):
    """An output cannot be written (exists without --force, no permission)."""


class Cancelled(GyrometerError):
    """Long work was cancelled by the user; nothing was written."""


class GyrometerWarning(UserWarning):
    """Base class of Gyrometer's warnings, so callers can filter by kind."""


class GeometryWarning(GyrometerWarning):
    """The geometry is outside the range where the method is reliable."""


class TracerWarning(GyrometerWarning):
    """The tracer may violate the method's assumptions (e.g. gas continuity)."""


class ConvergenceWarning(GyrometerWarning):
    """Slit integrals have not converged with slit length."""


class DataQualityWarning(GyrometerWarning):
    """Low signal-to-noise, few slits, truncated slits and similar."""
