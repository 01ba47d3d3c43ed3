"""Transfer functions: encoded code value <-> linear light.

Pure, vectorised functions over arrays of normalised code values V in [0, 1]. Output is
float32 unless the input is float64. Values slightly outside [0, 1] (limited-range video
undershoot/overshoot) are extended, never clipped, so that averaging faint signals stays
unbiased: the curves are odd-symmetric around zero and continue above 1.

References
----------
IEC 61966-2-1:1999, Multimedia systems and equipment - Colour measurement and
management - Part 2-1: Default RGB colour space - sRGB.
ITU-R BT.709-6 (2015), Parameter values for the HDTV standards, item 1.2 (OETF).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import InputFormatError

__all__ = [
    "srgb_decode",
    "srgb_encode",
    "bt709_decode",
    "bt709_encode",
    "gamma_decode",
    "gamma_encode",
    "TransferSpec",
    "parse_transfer",
    "TRANSFER_NAMES",
]

TRANSFER_NAMES = ("auto", "srgb", "bt709", "linear", "gamma=G", "profile=FILE")

# IEC 61966-2-1 constants.
_SRGB_V_BREAK = 0.04045
_SRGB_L_BREAK = 0.0031308
# ITU-R BT.709 OETF constants.
_BT709_L_BREAK = 0.018
_BT709_ALPHA = 1.099
_BT709_BETA = 0.099
_BT709_V_BREAK = _BT709_ALPHA * _BT709_L_BREAK**0.45 - _BT709_BETA  # 0.0812479440


def _as_float(values: ArrayLike) -> NDArray[np.floating]:
    arr = np.asarray(values)
    if arr.dtype == np.float64:
        return arr
    return arr.astype(np.float32, copy=False)


def srgb_decode(values: ArrayLike) -> NDArray[np.floating]:
    """sRGB encoded V -> linear L (IEC 61966-2-1).

    ``L = V/12.92`` for ``V <= 0.04045``, else ``((V + 0.055)/1.055)**2.4``.
    Negative input is mirrored (odd extension).
    """
    v = _as_float(values)
    a = np.abs(v)
    lin = np.where(a <= _SRGB_V_BREAK, a / 12.92, ((a + 0.055) / 1.055) ** 2.4)
    return (np.sign(v) * lin).astype(v.dtype, copy=False)


def srgb_encode(values: ArrayLike) -> NDArray[np.floating]:
    """Linear L -> sRGB encoded V (IEC 61966-2-1).

    ``V = 12.92 L`` for ``L <= 0.0031308``, else ``1.055 L**(1/2.4) - 0.055``.
    """
    lin = _as_float(values)
    a = np.abs(lin)
    v = np.where(a <= _SRGB_L_BREAK, 12.92 * a, 1.055 * a ** (1 / 2.4) - 0.055)
    return (np.sign(lin) * v).astype(lin.dtype, copy=False)


def bt709_decode(values: ArrayLike) -> NDArray[np.floating]:
    """BT.709 encoded E' -> scene linear L (inverse of the ITU-R BT.709 OETF).

    ``L = E/4.5`` for ``E < 0.0812479``, else ``((E + 0.099)/1.099)**(1/0.45)``.
    """
    v = _as_float(values)
    a = np.abs(v)
    lin = np.where(a < _BT709_V_BREAK, a / 4.5, ((a + _BT709_BETA) / _BT709_ALPHA) ** (1 / 0.45))
    return (np.sign(v) * lin).astype(v.dtype, copy=False)


def bt709_encode(values: ArrayLike) -> NDArray[np.floating]:
    """Scene linear L -> BT.709 encoded E' (ITU-R BT.709 OETF).

    ``E = 4.5 L`` for ``L < 0.018``, else ``1.099 L**0.45 - 0.099``.
    """
    lin = _as_float(values)
    a = np.abs(lin)
    v = np.where(a < _BT709_L_BREAK, 4.5 * a, _BT709_ALPHA * a**0.45 - _BT709_BETA)
    return (np.sign(lin) * v).astype(lin.dtype, copy=False)


def gamma_decode(values: ArrayLike, gamma: float) -> NDArray[np.floating]:
    """Pure power law ``L = V**gamma`` (odd extension below zero)."""
    v = _as_float(values)
    return (np.sign(v) * np.abs(v) ** gamma).astype(v.dtype, copy=False)


def gamma_encode(values: ArrayLike, gamma: float) -> NDArray[np.floating]:
    """Inverse of :func:`gamma_decode`: ``V = L**(1/gamma)``."""
    lin = _as_float(values)
    return (np.sign(lin) * np.abs(lin) ** (1.0 / gamma)).astype(lin.dtype, copy=False)


@dataclass(frozen=True)
class TransferSpec:
    """A parsed ``--transfer`` value.

    Attributes
    ----------
    kind : {"auto", "srgb", "bt709", "linear", "gamma", "profile"}
    gamma : float or None
        Exponent for ``kind == "gamma"``.
    profile_path : str or None
        Device profile JSON for ``kind == "profile"``.
    """

    kind: str
    gamma: float | None = None
    profile_path: str | None = None

    def __str__(self) -> str:
        if self.kind == "gamma":
            return f"gamma={self.gamma:g}"
        if self.kind == "profile":
            return f"profile={self.profile_path}"
        return self.kind


_GAMMA_RE = re.compile(r"^gamma=([0-9]*\.?[0-9]+)$")


def parse_transfer(text: str | TransferSpec) -> TransferSpec:
    """Parse ``auto``, ``srgb``, ``bt709``, ``linear``, ``gamma=G`` or ``profile=FILE``.

    Raises
    ------
    InputFormatError
        For any other text, or a gamma outside (0.1, 10).
    """
    if isinstance(text, TransferSpec):
        return text
    t = text.strip()
    low = t.lower()
    if low in ("auto", "srgb", "bt709", "linear"):
        return TransferSpec(low)
    m = _GAMMA_RE.match(low)
    if m:
        g = float(m.group(1))
        if not 0.1 < g < 10:
            raise InputFormatError(f"--transfer gamma={g:g} is outside 0.1..10")
        return TransferSpec("gamma", gamma=g)
    if low.startswith("profile="):
        return TransferSpec("profile", profile_path=t.split("=", 1)[1])
    raise InputFormatError(
        f"unknown transfer {text!r}; use one of {', '.join(TRANSFER_NAMES)}"
    )
