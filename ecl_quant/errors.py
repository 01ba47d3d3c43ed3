"""Exception hierarchy and warnings shared by every stage.

Every error the package raises on purpose derives from :class:`EclQuantError`, so the
CLI can turn it into one line and exit code 2. Errors about the user's input also
subclass :class:`ValueError`. Messages name the file (when there is one), say what was
received and what to do.
"""

from __future__ import annotations

from pathlib import Path

__all__ = [
    "EclQuantError",
    "InputFormatError",
    "ShapeMismatchError",
    "CalibrationError",
    "SpotError",
    "OutputError",
    "EclQuantWarning",
    "NoSpotsWarning",
    "TimingWarning",
    "IncompleteRecordingWarning",
]


class EclQuantError(Exception):
    """Base class of every deliberate ecl_quant error.

    Parameters
    ----------
    message : str
        What is wrong and what to do about it.
    path : str or Path, optional
        The file or folder the problem is in; prefixed to the message.
    """

    def __init__(self, message: str, *, path: str | Path | None = None) -> None:
        self.path = None if path is None else str(path)
        self.reason = message
        super().__init__(f"{self.path}: {message}" if self.path else message)


class InputFormatError(EclQuantError, ValueError):
    """A file is missing, unreadable, truncated or not of the expected kind."""


class ShapeMismatchError(EclQuantError, ValueError):
    """Arrays or frames that must agree in size or depth do not."""


class CalibrationError(EclQuantError, ValueError):
    """A calibration cannot be fitted, loaded or applied."""


class SpotError(EclQuantError, ValueError):
    """Spot definitions are malformed or do not fit the frame."""


class OutputError(EclQuantError, OSError):
    """Results cannot be written (read-only folder, disk full, existing output)."""


class EclQuantWarning(UserWarning):
    """Base class of ecl_quant warnings: valid input with a doubtful outcome."""


class NoSpotsWarning(EclQuantWarning):
    """Spot detection found nothing."""


class TimingWarning(EclQuantWarning):
    """Frame times were not known and had to be assumed."""


class IncompleteRecordingWarning(EclQuantWarning):
    """A video holds fewer frames than its index lists: the file was cut short."""
