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
from .frames import Frame
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
    "parse_transfer",
]
