"""ecl_quant: camera recordings of electrochemiluminescence to concentrations.

The pipeline, one module per stage: frames -> radiometry -> spots -> curves ->
calibration -> camera -> batch -> report; ``cli`` sits on top.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import (
    CalibrationError,
    EclQuantError,
    EclQuantWarning,
    InputFormatError,
    NoSpotsWarning,
    OutputError,
    ShapeMismatchError,
    SpotError,
    TimingWarning,
)
from .frames import ExifInfo, Frame, Recording, iter_frames, open_recording, read_exif
from .radiometry import LinearSettings, MasterDark, load_dark, master_dark
from .transfer import parse_transfer

__all__ = [
    "__version__",
    "CalibrationError",
    "EclQuantError",
    "EclQuantWarning",
    "InputFormatError",
    "NoSpotsWarning",
    "OutputError",
    "ShapeMismatchError",
    "SpotError",
    "TimingWarning",
    "Frame",
    "ExifInfo",
    "Recording",
    "open_recording",
    "iter_frames",
    "read_exif",
    "LinearSettings",
    "MasterDark",
    "master_dark",
    "load_dark",
    "parse_transfer",
]
