"""Radiometry: from encoded frame codes to linear light, dark frames, flats, exposure.

The chain for one spot crop is::

    V = channel_values(frame, channel, region=crop)    # encoded, normalised, float32
    L = linearize(V, resolve_transfer(spec, frame))     # linear full-scale units
    L = L - dark.level[crop]                           # master dark (linear)
    L = apply_flat(L, flat, region=crop)                # optional
    L = normalise_exposure(L, frame.exposure_s)         # per second of exposure

Only the crop is ever converted to float32; frames stay integer.

Conventions
-----------
* **Stills**: V = code / max_code per RGB channel. ``luma`` is the Rec. 709 luma of the
  *encoded* values, Y' = 0.2126 R' + 0.7152 G' + 0.0722 B' (ITU-R BT.709-6 item 3.2),
  so it is itself an encoded value and is linearised with the same transfer function
  (an approximation; a single colour channel is exact).
* **Video** (ITU-R BT.601-7 / BT.709-6 / BT.2020 Y'CbCr, n-bit codes, s = 2^(n-8)):
  limited range E'Y = (Y - 16 s) / (219 s), E'C = (C - 128 s) / (224 s);
  full range E'Y = Y / (2^n - 1), E'C = (C - 2^(n-1)) / (2^n - 1).
  R' = E'Y + (2 - 2 Kr) E'Cr, B' = E'Y + (2 - 2 Kb) E'Cb,
  G' = (E'Y - Kr R' - Kb B') / Kg, with Kr, Kb from the stream's matrix tag.
  Chroma is upsampled by nearest neighbour: pixel (y, x) uses chroma sample
  (y // step_y, x // step_x). Values below 0 or above 1 are kept (never clipped).
* **Raw**: V = (code - black) / (white - black) per photosite, already linear.
  ``raw`` gives every photosite; ``red``/``green``/``blue`` give that CFA colour, each
  photosite of another colour taking the value of its 2x2 cell's photosite(s) of that
  colour (the mean of the two greens).

References
----------
ITU-R BT.601-7 (2011), BT.709-6 (2015), BT.2020-2 (2015): Y'CbCr matrices and ranges.
IEC 61966-2-1:1999: sRGB. EMVA 1288 Release 4.0, section 6.6: saturation.
"""

from __future__ import annotations

import functools
import json
import math
import os
import tempfile
import warnings
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import InputFormatError, ShapeMismatchError, TimingWarning
from .frames import Frame, Recording, open_recording
from .transfer import (
    TransferSpec,
    bt709_decode,
    gamma_decode,
    parse_transfer,
    srgb_decode,
)

__all__ = [
    "camera_noise_model",
    "CHANNELS",
    "LinearSettings",
    "MasterDark",
    "TransferProfile",
    "resolve_transfer",
    "transfer_choice",
    "channel_values",
    "linearize",
    "linear_values",
    "saturation_floor",
    "saturation_mask",
    "load_transfer_profile",
    "master_dark",
    "load_dark",
    "hot_pixel_map",
    "flat_field",
    "apply_flat",
    "normalise_exposure",
    "DEFAULT_MEMORY_BYTES",
    "PROFILE_SCHEMA",
]

Channel = Literal["red", "green", "blue", "luma", "raw"]
CHANNELS: tuple[str, ...] = ("red", "green", "blue", "luma", "raw")

#: Byte budget for stacking dark frames (median / sigma clipping).
DEFAULT_MEMORY_BYTES = 256 * 2**20

#: ``schema`` value of a device profile file.
PROFILE_SCHEMA = "ecl_quant.device_profile"

# (Kr, Kb) per matrix: ITU-R BT.601-7, BT.709-6, BT.2020-2.
_YUV_KR_KB = {"bt601": (0.299, 0.114), "bt709": (0.2126, 0.0722), "bt2020": (0.2627, 0.0593)}
# Rec. 709 luma weights for encoded R'G'B' stills (ITU-R BT.709-6 item 3.2).
_LUMA_709 = (0.2126, 0.7152, 0.0722)
# 1 / Phi^-1(3/4): MAD -> standard deviation for normal data (common practice).
_MAD_TO_SIGMA = 1.482602218505602
_RGB_INDEX = {"red": 0, "green": 1, "blue": 2}
# CFA colour indices (rawpy raw_colors: 0 = R, 1 = G, 2 = B, 3 = second G).
_CFA_COLOURS = {"red": (0,), "green": (1, 3), "blue": (2,)}
_HDR_TRC = {"arib-std-b67": "HLG", "smpte2084": "PQ"}


# ----------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class LinearSettings:
    """How encoded codes become linear light.

    Attributes
    ----------
    channel : {"red", "green", "blue", "luma", "raw"}
        Colour channel to measure (red for Ru(bpy)3 emission, blue for luminol).
    transfer : str or TransferSpec
        ``auto``, ``srgb``, ``bt709``, ``linear``, ``gamma=G`` or ``profile=FILE``.
    saturation_level : float
        Fraction of the encoded maximum at or above which a pixel counts as saturated.
    """

    channel: str = "red"
    transfer: str | TransferSpec = "auto"
    saturation_level: float = 0.98

    def __post_init__(self) -> None:
        if self.channel not in CHANNELS:
            raise InputFormatError(
                f"unknown channel {self.channel!r}; use one of {', '.join(CHANNELS)}"
            )
        parse_transfer(self.transfer)
        if not 0.0 < float(self.saturation_level) <= 1.0:
            raise InputFormatError(
                f"saturation level {self.saturation_level!r} must be in (0, 1]"
            )

    @property
    def spec(self) -> TransferSpec:
        """The parsed transfer specification (possibly still ``auto``)."""
        return parse_transfer(self.transfer)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form for provenance."""
        return {"channel": self.channel, "transfer": str(self.spec),
                "saturation_level": float(self.saturation_level)}


# ----------------------------------------------------------------------------- transfer


def _auto_transfer(src: Frame | Recording) -> tuple[TransferSpec, str]:
    if isinstance(src, Recording):
        kind = {"stills": "still", "video": "video", "raw": "raw"}[src.kind]
        bit_depth = src.bit_depth
        trc = src.metadata.get("color_trc") if kind == "video" else None
        where: str | None = src.path
    else:
        kind, bit_depth, trc, where = src.kind, src.bit_depth, src.transfer_tag, src.source
    if kind == "raw":
        return TransferSpec("linear"), "raw DNG photosites are linear"
    if kind == "video":
        if trc in _HDR_TRC:
            raise InputFormatError(
                f"video is HDR ({_HDR_TRC[trc]} transfer); the BT.709 curve does not apply: "
                "record in SDR (turn HDR video off) or pass --transfer profile=FILE",
                path=where,
            )
        if trc == "iec61966-2-1":
            return TransferSpec("srgb"), "video is tagged with the sRGB transfer"
        if trc == "linear":
            return TransferSpec("linear"), "video is tagged linear"
        return TransferSpec("bt709"), "video is assumed BT.709 (ITU-R BT.709-6 OETF)"
    if bit_depth > 8:
        return TransferSpec("linear"), f"{bit_depth}-bit stills are assumed linear"
    return TransferSpec("srgb"), "8-bit stills are assumed sRGB (IEC 61966-2-1)"


def resolve_transfer(spec: TransferSpec | str, frame_or_recording: Frame | Recording
                     ) -> TransferSpec:
    """Replace ``auto`` by the transfer function that fits the source.

    8-bit stills -> sRGB; video -> BT.709 (sRGB/linear when the stream says so);
    16-bit TIFF/PNG and raw DNG -> linear. Any other spec is returned unchanged.

    Raises
    ------
    InputFormatError
        For ``auto`` on HDR (HLG/PQ) video, where no standard SDR curve applies.
    """
    parsed = parse_transfer(spec)
    if parsed.kind != "auto":
        return parsed
    return _auto_transfer(frame_or_recording)[0]


def transfer_choice(spec: TransferSpec | str, frame_or_recording: Frame | Recording
                    ) -> dict[str, str]:
    """The transfer resolution as a provenance record: requested, resolved, reason."""
    parsed = parse_transfer(spec)
    if parsed.kind != "auto":
        return {"requested": str(parsed), "resolved": str(parsed), "reason": "given"}
    resolved, reason = _auto_transfer(frame_or_recording)
    return {"requested": "auto", "resolved": str(resolved), "reason": reason}


@dataclass(frozen=True, eq=False)
class TransferProfile:
    """A device response loaded from a profile file: encoded V -> linear, per channel.

    Call it as ``profile(values, channel)``. Between table entries the curve is
    interpolated linearly; outside [0, 1] it is extended along the end segments.

    Attributes
    ----------
    path : str
    encoded : (N,) ndarray of float64
        Encoded positions of the table entries (default: ``linspace(0, 1, N)``, i.e.
        entry i is 8-bit code i for N = 256).
    response : dict of str -> (N,) ndarray of float64
        Linear value per channel name.
    meta : dict
        The rest of the file (device, date, method...), for provenance.
    """

    path: str
    encoded: NDArray[np.float64]
    response: Mapping[str, NDArray[np.float64]]
    meta: Mapping[str, Any] = field(default_factory=dict)

    def curve(self, channel: str | None) -> NDArray[np.float64]:
        """The response table for ``channel`` (the only one when there is just one)."""
        if channel is not None and channel in self.response:
            return self.response[channel]
        if len(self.response) == 1:
            return next(iter(self.response.values()))
        if channel in ("luma", None):
            for alt in ("luma", "grey", "gray", "green"):
                if alt in self.response:
                    return self.response[alt]
        raise InputFormatError(
            f"profile has no response for channel {channel!r} (it has "
            f"{', '.join(self.response)}); measure that channel or choose another",
            path=self.path,
        )

    def __call__(self, values: ArrayLike, channel: str | None = None) -> NDArray[np.float32]:
        v = np.asarray(values, dtype=np.float64)
        x, y = self.encoded, self.curve(channel)
        out = np.interp(v, x, y)
        lo, hi = v < x[0], v > x[-1]
        if lo.any():
            out[lo] = y[0] + (v[lo] - x[0]) * (y[1] - y[0]) / (x[1] - x[0])
        if hi.any():
            out[hi] = y[-1] + (v[hi] - x[-1]) * (y[-1] - y[-2]) / (x[-1] - x[-2])
        return out.astype(np.float32)


@functools.lru_cache(maxsize=16)
def _load_profile_cached(path: str, mtime_ns: int, size: int) -> TransferProfile:
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as err:
        raise InputFormatError(f"cannot read the profile ({err})", path=p) from err
    except json.JSONDecodeError as err:
        raise InputFormatError(
            f"profile is not valid JSON (line {err.lineno}: {err.msg}); re-create it",
            path=p,
        ) from err
    if not isinstance(doc, dict) or doc.get("schema") != PROFILE_SCHEMA:
        raise InputFormatError(
            f"not a device profile (expected \"schema\": \"{PROFILE_SCHEMA}\")", path=p
        )
    if doc.get("version") != 1:
        raise InputFormatError(
            f"profile version {doc.get('version')!r} is not supported (this ecl_quant reads "
            "version 1); re-create the profile with this version",
            path=p,
        )
    response = doc.get("response")
    if not isinstance(response, dict) or not response:
        raise InputFormatError("profile has no \"response\" curves", path=p)
    curves: dict[str, NDArray[np.float64]] = {}
    n = None
    for name, table in response.items():
        try:
            arr = np.asarray(table, dtype=np.float64)
        except (TypeError, ValueError) as err:
            raise InputFormatError(f"response curve {name!r} is not a list of numbers",
                                   path=p) from err
        if arr.ndim != 1 or arr.size < 2 or not np.all(np.isfinite(arr)):
            raise InputFormatError(
                f"response curve {name!r} must be a list of at least 2 finite numbers",
                path=p,
            )
        if np.any(np.diff(arr) < 0):
            raise InputFormatError(
                f"response curve {name!r} decreases somewhere; a camera response must "
                "not decrease: re-measure the profile",
                path=p,
            )
        if n is not None and arr.size != n:
            raise InputFormatError("response curves differ in length", path=p)
        n = arr.size
        curves[str(name)] = arr
    assert n is not None
    if "encoded" in doc:
        encoded = np.asarray(doc["encoded"], dtype=np.float64)
        if encoded.shape != (n,) or np.any(np.diff(encoded) <= 0):
            raise InputFormatError(
                "\"encoded\" must list increasing positions, one per response entry", path=p
            )
    else:
        encoded = np.linspace(0.0, 1.0, n)
    meta = {k: v for k, v in doc.items() if k not in ("response", "encoded")}
    return TransferProfile(path=str(p), encoded=encoded, response=curves, meta=meta)


def load_transfer_profile(path: str | Path) -> TransferProfile:
    """Load a device response profile (JSON) as a callable ``profile(values, channel)``.

    Schema (version 1)::

        {"schema": "ecl_quant.device_profile", "version": 1,
         "response": {"red": [256 floats], "green": [...], "blue": [...]},
         "encoded": [optional, N increasing encoded positions in 0..1]}

    Entry i of a response is the linear value of encoded V = i / (N - 1) (8-bit code i
    for N = 256) unless ``encoded`` says otherwise. Other keys are kept as ``meta``.

    Raises
    ------
    InputFormatError
        Missing file, invalid JSON, wrong schema/version, or malformed curves.
    """
    p = Path(path).expanduser().resolve()
    try:
        st = p.stat()
    except OSError as err:
        raise InputFormatError("profile file not found; check the --transfer profile= path",
                               path=path) from err
    return _load_profile_cached(str(p), st.st_mtime_ns, st.st_size)


def linearize(values: ArrayLike, transfer: TransferSpec | str, *,
              channel: str | None = None) -> NDArray[np.float32]:
    """Encoded normalised values V -> linear full-scale units (float32, new array).

    Parameters
    ----------
    values : ndarray
        Output of :func:`channel_values`.
    transfer : TransferSpec or str
        A resolved spec (not ``auto``; see :func:`resolve_transfer`).
    channel : str, optional
        Selects the curve of a ``profile=`` transfer.

    Raises
    ------
    InputFormatError
        For ``auto`` (resolve first) or a bad profile.
    """
    spec = parse_transfer(transfer)
    v = np.asarray(values)
    if v.dtype != np.float32:
        v = v.astype(np.float32)
    if spec.kind == "srgb":
        out = srgb_decode(v)
    elif spec.kind == "bt709":
        out = bt709_decode(v)
    elif spec.kind == "gamma":
        assert spec.gamma is not None
        out = gamma_decode(v, spec.gamma)
    elif spec.kind == "linear":
        out = v.copy()
    elif spec.kind == "profile":
        assert spec.profile_path is not None
        out = load_transfer_profile(spec.profile_path)(v, channel)
    else:
        raise InputFormatError(
            "transfer 'auto' must be resolved against the recording first "
            "(radiometry.resolve_transfer)"
        )
    return np.asarray(out, dtype=np.float32)


# ----------------------------------------------------------------------------- channels


def _bounds(region: tuple[slice, slice] | None, shape: tuple[int, int]
            ) -> tuple[int, int, int, int]:
    h, w = shape
    if region is None:
        return 0, h, 0, w
    try:
        rs, cs = region
    except (TypeError, ValueError) as err:
        raise ShapeMismatchError("region must be a (row slice, column slice) pair") from err
    if not isinstance(rs, slice) or not isinstance(cs, slice):
        raise ShapeMismatchError("region must be a (row slice, column slice) pair")
    r0, r1, rstep = rs.indices(h)
    c0, c1, cstep = cs.indices(w)
    if rstep != 1 or cstep != 1:
        raise ShapeMismatchError("region slices must have step 1")
    return r0, max(r0, r1), c0, max(c0, c1)


def _check_channel(channel: str) -> None:
    if channel not in CHANNELS:
        raise InputFormatError(f"unknown channel {channel!r}; use one of {', '.join(CHANNELS)}")


def _still_values(frame: Frame, channel: str, b: tuple[int, int, int, int]
                  ) -> NDArray[np.float32]:
    r0, r1, c0, c1 = b
    if channel == "raw":
        raise InputFormatError(
            "channel 'raw' needs a raw DNG recording; use red, green, blue or luma",
            path=frame.source,
        )
    scale = np.float32(1.0 / frame.max_code)
    crop = frame.data[r0:r1, c0:c1]
    if crop.ndim == 2:  # grey image: every channel is the grey value
        return np.multiply(crop, scale, dtype=np.float32)
    if channel == "luma":
        kr, kg, kb = _LUMA_709
        rgb = crop.astype(np.float32)
        out = kr * rgb[..., 0] + kg * rgb[..., 1] + kb * rgb[..., 2]
        out *= scale
        return out
    return np.multiply(crop[..., _RGB_INDEX[channel]], scale, dtype=np.float32)


def _video_scales(frame: Frame) -> tuple[float, float, float, float]:
    """(y_offset, y_span, c_offset, c_span) in codes for the frame's range and depth."""
    n = frame.bit_depth
    if frame.yuv_range == "full":
        top = float(2**n - 1)
        return 0.0, top, float(2 ** (n - 1)), top
    s = float(2 ** (n - 8))
    return 16.0 * s, 219.0 * s, 128.0 * s, 224.0 * s


def _video_rgb(frame: Frame, b: tuple[int, int, int, int], channels: Iterable[str]
               ) -> dict[str, NDArray[np.float32]]:
    """Normalised E'Y and requested R', G', B' of a crop (chroma nearest neighbour)."""
    r0, r1, c0, c1 = b
    y_off, y_span, c_off, c_span = _video_scales(frame)
    ey = frame.data[r0:r1, c0:c1].astype(np.float32)
    ey -= np.float32(y_off)
    ey *= np.float32(1.0 / y_span)
    out = {"luma": ey}
    wanted = [c for c in channels if c in _RGB_INDEX]
    if not wanted:
        return out
    if frame.chroma is None:  # grey video
        for c in wanted:
            out[c] = ey
        return out
    if r1 <= r0 or c1 <= c0:
        for c in wanted:
            out[c] = ey.copy()
        return out
    cb_plane, cr_plane = frame.chroma
    step = tuple(frame.chroma_step)
    inv = np.float32(1.0 / c_span)
    kr, kb = _YUV_KR_KB.get(frame.yuv_matrix, _YUV_KR_KB["bt601"])
    kg = 1.0 - kr - kb
    ecb = ecr = None
    # Chroma by nearest neighbour (_upsample_chroma), then scaled code by code.
    if "blue" in wanted or "green" in wanted:
        ecb = (_upsample_chroma(cb_plane, step, b).astype(np.float32) - np.float32(c_off)) * inv
    if "red" in wanted or "green" in wanted:
        ecr = (_upsample_chroma(cr_plane, step, b).astype(np.float32) - np.float32(c_off)) * inv
    if "red" in wanted:
        out["red"] = ey + np.float32(2.0 - 2.0 * kr) * ecr
    if "blue" in wanted:
        out["blue"] = ey + np.float32(2.0 - 2.0 * kb) * ecb
    if "green" in wanted:
        # G' = (Y' - Kr R' - Kb B') / Kg, expanded in Cb, Cr.
        out["green"] = (ey - np.float32(kb * (2.0 - 2.0 * kb) / kg) * ecb
                        - np.float32(kr * (2.0 - 2.0 * kr) / kg) * ecr)
    return out


def _code_threshold(threshold: float, dtype: np.dtype[Any]) -> Any:
    """A threshold for integer codes that selects the same codes as ``>= threshold``."""
    if not np.issubdtype(dtype, np.integer):
        return threshold
    return min(math.ceil(threshold), int(np.iinfo(dtype).max) + 1)


def _video_candidate_luma(frame: Frame, b: tuple[int, int, int, int], level: float) -> float:
    """Smallest Y' code from which R', G' or B' could reach ``level`` in a crop.

    R' and B' grow with E'Y and with E'Cr / E'Cb; G' grows with E'Y and falls with
    both. With the covering chroma block's extremes (the mapping of :func:`_video_rgb`)
    the largest possible lift of E'Y is bounded, and so is the E'Y each pixel needs.
    """
    assert frame.chroma is not None
    r0, r1, c0, c1 = b
    y_off, y_span, c_off, c_span = _video_scales(frame)
    sy, sx = frame.chroma_step
    cb_plane, cr_plane = frame.chroma
    hc, wc = cb_plane.shape
    rr = slice(min(r0 // sy, hc - 1), min((r1 - 1) // sy, hc - 1) + 1)
    cc = slice(min(c0 // sx, wc - 1), min((c1 - 1) // sx, wc - 1) + 1)
    cb, cr = cb_plane[rr, cc], cr_plane[rr, cc]
    cb_lo, cb_hi = ((float(cb.min()) - c_off) / c_span, (float(cb.max()) - c_off) / c_span)
    cr_lo, cr_hi = ((float(cr.min()) - c_off) / c_span, (float(cr.max()) - c_off) / c_span)
    kr, kb = _YUV_KR_KB.get(frame.yuv_matrix, _YUV_KR_KB["bt601"])
    kg = 1.0 - kr - kb
    lift = max((2.0 - 2.0 * kr) * cr_hi, (2.0 - 2.0 * kb) * cb_hi,
               -kb * (2.0 - 2.0 * kb) / kg * cb_lo - kr * (2.0 - 2.0 * kr) / kg * cr_lo)
    return y_off + y_span * (level - lift)


def _video_rgb_at(frame: Frame, b: tuple[int, int, int, int], flat: NDArray[np.intp]
                  ) -> tuple[NDArray[np.float32], NDArray[np.float32], NDArray[np.float32]]:
    """(R', G', B') at the given flat indices of a crop: the arithmetic of _video_rgb."""
    assert frame.chroma is not None
    r0, _r1, c0, c1 = b
    y_off, y_span, c_off, c_span = _video_scales(frame)
    rows = r0 + flat // (c1 - c0)
    cols = c0 + flat % (c1 - c0)
    sy, sx = frame.chroma_step
    cb_plane, cr_plane = frame.chroma
    crow = np.minimum(rows // sy, cb_plane.shape[0] - 1)
    ccol = np.minimum(cols // sx, cb_plane.shape[1] - 1)
    ey = frame.data[rows, cols].astype(np.float32)
    ey -= np.float32(y_off)
    ey *= np.float32(1.0 / y_span)
    inv = np.float32(1.0 / c_span)
    ecb = (cb_plane[crow, ccol].astype(np.float32) - np.float32(c_off)) * inv
    ecr = (cr_plane[crow, ccol].astype(np.float32) - np.float32(c_off)) * inv
    kr, kb = _YUV_KR_KB.get(frame.yuv_matrix, _YUV_KR_KB["bt601"])
    kg = 1.0 - kr - kb
    red = ey + np.float32(2.0 - 2.0 * kr) * ecr
    blue = ey + np.float32(2.0 - 2.0 * kb) * ecb
    green = (ey - np.float32(kb * (2.0 - 2.0 * kb) / kg) * ecb
             - np.float32(kr * (2.0 - 2.0 * kr) / kg) * ecr)
    return red, green, blue


def _raw_cells(frame: Frame, b: tuple[int, int, int, int], channel: str,
               base_of: Callable[[slice, slice], NDArray[Any]], reduce: str) -> NDArray[Any]:
    """Fill a crop from each photosite's 2x2 CFA cell.

    ``base_of(rows, cols)`` returns the per-photosite quantity (normalised values or
    codes) for a block of the mosaic; only the crop grown to whole cells is asked for.
    reduce: "mean" (values) or "max" (saturation). Photosites of the wanted colour keep
    their own value. Cells start at even coordinates of the full mosaic (the last cell
    is moved inwards when a side is odd).
    """
    r0, r1, c0, c1 = b
    h, w = frame.shape
    if frame.cfa is None:
        raise InputFormatError("raw frame has no CFA layout", path=frame.source)
    if r1 <= r0 or c1 <= c0:
        return np.asarray(base_of(slice(r0, r1), slice(c0, c1)))
    if h < 2 or w < 2:
        raise ShapeMismatchError("raw mosaic is smaller than one 2x2 cell", path=frame.source)
    colours = np.asarray(_CFA_COLOURS[channel], dtype=np.uint8)
    ys = np.arange(r0, r1)
    xs = np.arange(c0, c1)
    y0 = np.minimum(ys - ys % 2, h - 2)
    x0 = np.minimum(xs - xs % 2, w - 2)
    g0, g1 = int(y0.min()), int(y0.max()) + 2
    k0, k1 = int(x0.min()), int(x0.max()) + 2
    base = base_of(slice(g0, g1), slice(k0, k1))
    cfa = frame.cfa[g0:g1, k0:k1]
    yi = (y0 - g0)[:, None]
    xi = (x0 - k0)[None, :]
    acc: NDArray[Any] | None = None
    count = np.zeros((ys.size, xs.size), dtype=np.float32)
    for dy in (0, 1):
        for dx in (0, 1):
            idx = (yi + dy, xi + dx)
            m = np.isin(cfa[idx], colours)
            term = np.where(m, base[idx], 0)
            if reduce == "mean":
                acc = term.astype(np.float32) if acc is None else acc + term
            else:
                acc = term if acc is None else np.maximum(acc, term)
            count += m
    assert acc is not None
    if np.any(count == 0):
        raise InputFormatError(
            f"the CFA is not a 2x2 Bayer pattern (a cell has no {channel} photosite); use "
            "channel 'raw'",
            path=frame.source,
        )
    filled = acc / count if reduce == "mean" else acc
    own_rows = slice(r0 - g0, r1 - g0)
    own_cols = slice(c0 - k0, c1 - k0)
    own = np.isin(cfa[own_rows, own_cols], colours)
    return np.where(own, base[own_rows, own_cols], filled)


def _raw_normalised(frame: Frame, rows: slice, cols: slice) -> NDArray[np.float32]:
    codes = frame.data[rows, cols].astype(np.float32)
    black = frame.black_level
    if isinstance(black, np.ndarray):
        blk = black[rows, cols].astype(np.float32)
        span = np.float32(frame.max_code) - blk
        return (codes - blk) / span
    span = np.float32(frame.max_code - float(black))
    codes -= np.float32(black)
    codes /= span
    return codes


def _raw_values(frame: Frame, channel: str, b: tuple[int, int, int, int]
                ) -> NDArray[np.float32]:
    r0, r1, c0, c1 = b
    if channel == "luma":
        raise InputFormatError(
            "channel 'luma' is not defined on a raw mosaic; use raw, red, green or blue",
            path=frame.source,
        )
    if channel == "raw":
        return _raw_normalised(frame, slice(r0, r1), slice(c0, c1))
    return _raw_cells(frame, b, channel, lambda rs, cs: _raw_normalised(frame, rs, cs),
                      "mean").astype(np.float32)


def channel_values(frame: Frame, channel: str, *,
                   region: tuple[slice, slice] | None = None) -> NDArray[np.float32]:
    """Encoded, normalised values V of one channel on a crop of a frame.

    Parameters
    ----------
    frame : Frame
    channel : {"red", "green", "blue", "luma", "raw"}
        ``raw`` only for DNG mosaics; ``luma`` not for DNG (see the module notes).
    region : (slice, slice), optional
        Rows and columns of the crop (numpy semantics; clipped to the frame). Whole
        frame when omitted.

    Returns
    -------
    (h, w) ndarray of float32
        V in 0..1 for stills and raw; may lie outside 0..1 for limited-range video.

    Raises
    ------
    InputFormatError
        Unknown channel, or a channel that does not exist for this kind of frame.
    """
    _check_channel(channel)
    b = _bounds(region, frame.shape)
    if frame.kind == "video":
        if channel == "raw":
            raise InputFormatError(
                "channel 'raw' needs a raw DNG recording; use red, green, blue or luma",
                path=frame.source,
            )
        return _video_rgb(frame, b, [channel])[channel]
    if frame.kind == "raw":
        return _raw_values(frame, channel, b)
    return _still_values(frame, channel, b)


def linear_values(frame: Frame, channel: str, transfer: TransferSpec | str = "auto", *,
                  region: tuple[slice, slice] | None = None) -> NDArray[np.float32]:
    """:func:`channel_values` then :func:`linearize`, resolving ``auto`` on the frame.

    For 8-bit video (``luma``, ``red``, ``blue``) and 8/16-bit stills (a colour channel,
    or grey) the values are read from a table of every code (or (Y', Cr) / (Y', Cb)
    code pair) made once with those same two functions, so they are the same numbers,
    computed with one lookup per pixel.
    """
    spec = resolve_transfer(transfer, frame)
    fast = _table_values(frame, channel, spec, region)
    if fast is not None:
        return fast
    return linearize(channel_values(frame, channel, region=region), spec, channel=channel)


_TABLE_TRANSFERS = ("srgb", "bt709", "gamma", "linear")


@functools.lru_cache(maxsize=32)
def _code_table(kind: str, channel: str, dtype: str, matrix: str, yuv_range: str,
                chroma: bool, spec_kind: str, gamma: float | None) -> NDArray[np.float32]:
    """Linear value of every code (video red/blue: every (Y', C) pair, index Y' * 256 + C)."""
    spec = TransferSpec(spec_kind, gamma)
    dt = np.dtype(dtype)
    if kind == "still":
        codes = np.arange(np.iinfo(dt).max + 1, dtype=dt)[None, :]
        grid = Frame(index=0, time_s=0.0, data=codes, max_code=float(np.iinfo(dt).max),
                     source="", kind="still", bit_depth=8 * dt.itemsize)
    elif not chroma:
        grid = Frame(index=0, time_s=0.0, data=np.arange(256, dtype=np.uint8)[None, :],
                     max_code=255.0, source="", kind="video", yuv_matrix=matrix,
                     yuv_range=yuv_range, bit_depth=8)
    else:
        y = np.repeat(np.arange(256, dtype=np.uint8)[:, None], 256, axis=1)
        c = np.ascontiguousarray(y.T)
        grid = Frame(index=0, time_s=0.0, data=y, max_code=255.0, source="", kind="video",
                     chroma=(c, c), chroma_step=(1, 1), yuv_matrix=matrix,
                     yuv_range=yuv_range, bit_depth=8)
    table = linearize(channel_values(grid, channel), spec, channel=channel).reshape(-1)
    table.flags.writeable = False
    return table


@dataclass(frozen=True, eq=False)
class PlaneSource:
    """Where the codes of a crop come from, for readers that gather only the pixels
    they need (:mod:`ecl_quant._jit`) instead of building the whole crop.

    Pixel (y, x) of the crop (frame pixel ``(r0 + y, c0 + x)``) has the code
    ``luma[r, c]`` or, paired (video red/blue), ``luma[r, c] * 256 +
    chroma[chroma_rows[r], chroma_cols[c]]``: the nearest-neighbour chroma of
    :func:`_upsample_chroma`. For stills ``luma`` is the channel's plane (a strided
    view of an RGB image) and there is no chroma.
    """

    luma: NDArray[Any]
    chroma: NDArray[np.uint8] | None
    bounds: tuple[int, int, int, int]  # (r0, r1, c0, c1) in frame pixels
    step: tuple[int, int]
    chroma_rows: NDArray[np.int32]  # for every frame row
    chroma_cols: NDArray[np.int32]  # for every frame column

    @property
    def shape(self) -> tuple[int, int]:
        r0, r1, c0, c1 = self.bounds
        return r1 - r0, c1 - c0

    @property
    def step_shifts(self) -> tuple[int, int] | None:
        """The chroma steps as bit shifts, as the compiled gather takes them, or None
        when a step is not a power of two."""
        if any(v & (v - 1) for v in self.step):
            return None
        sy, sx = (int(v).bit_length() - 1 for v in self.step)
        return sy, sx

    def crop_codes(self) -> NDArray[Any]:
        """Codes of the whole crop (as :func:`code_values` builds them)."""
        r0, r1, c0, c1 = self.bounds
        y = self.luma[r0:r1, c0:c1]
        if self.chroma is None:
            if y.strides[1] != y.itemsize:  # one channel of an interleaved still
                return np.ascontiguousarray(y)
            return y
        idx = y.astype(np.uint16)
        idx <<= 8
        idx |= _upsample_chroma(self.chroma, self.step, self.bounds)
        return idx

    def codes_at(self, flat: NDArray[np.integer[Any]]) -> NDArray[Any]:
        """Codes of the crop pixels at flat crop indices."""
        r0, _r1, c0, c1 = self.bounds
        rows, cols = np.divmod(np.asarray(flat, np.intp), c1 - c0)
        rows += r0
        cols += c0
        y = self.luma[rows, cols]
        if self.chroma is None:
            return y
        code = y.astype(np.uint16) << 8
        return code | self.chroma[self.chroma_rows[rows], self.chroma_cols[cols]]


class CodedCrop:
    """A crop as integer codes plus the table of their linear values.

    ``values()`` equals :func:`linear_values` of the same crop. ``rank`` orders the codes
    by value (equal values share a rank) and ``rank_value`` is the value of each rank,
    ascending, so sorting codes by rank sorts their values: 16-bit ranks sort by radix in
    linear time, where sorting the float values costs n log n.

    Attributes
    ----------
    codes : (h, w) ndarray of uint8 or uint16
        Index into ``table`` of every pixel (video red/blue: Y' * 256 + C). With a
        ``source``, made from it on first use.
    table : (n,) ndarray of float32
    rank : (n,) ndarray of uint16
    rank_value : (m,) ndarray of float64
    paired : bool
        The codes are Y' * 256 + C (video red/blue), not one sample value.
    source : PlaneSource or None
        The decoded planes the codes come from (video), for gathering readers.
    """

    __slots__ = ("_codes", "table", "rank", "rank_value", "paired", "source")

    def __init__(self, codes: NDArray[np.unsignedinteger[Any]] | None,
                 table: NDArray[np.float32], rank: NDArray[np.uint16],
                 rank_value: NDArray[np.float64], paired: bool = False, *,
                 source: PlaneSource | None = None) -> None:
        if codes is None and source is None:
            raise ValueError("CodedCrop needs codes or a source")
        self._codes = codes
        self.table = table
        self.rank = rank
        self.rank_value = rank_value
        self.paired = paired
        self.source = source

    @property
    def codes(self) -> NDArray[np.unsignedinteger[Any]]:
        if self._codes is None:
            assert self.source is not None
            self._codes = self.source.crop_codes()
        return self._codes

    @property
    def shape(self) -> tuple[int, int]:
        """(h, w) of the crop."""
        if self._codes is None and self.source is not None:
            return self.source.shape
        h, w = self.codes.shape
        return int(h), int(w)

    def codes_at(self, flat: NDArray[np.integer[Any]]) -> NDArray[Any]:
        """Codes at flat crop indices (from the planes when the crop is not built)."""
        if self._codes is None and self.source is not None:
            return self.source.codes_at(flat)
        return self.codes.reshape(-1)[flat]

    def values(self) -> NDArray[np.float32]:
        """Linear value of every pixel (a new float32 array)."""
        if self._codes is None and self.source is not None:
            out = _gathered_values(self.source, self.table)
            if out is not None:
                return out
        return np.take(self.table, self.codes)


@functools.lru_cache(maxsize=8)
def _row_runs(h: int, w: int) -> NDArray[np.int64]:
    """The rows of an (h, w) crop as gather runs (first entry, row, column, length)."""
    r = np.arange(h, dtype=np.int64)
    runs = np.column_stack([r * w, r, np.zeros(h, np.int64), np.full(h, w, np.int64)])
    runs.flags.writeable = False
    return runs


def _gathered_values(src: PlaneSource, table: NDArray[Any]) -> NDArray[np.float32] | None:
    """Every value of the crop read from the planes by the compiled gather (the codes
    of :meth:`PlaneSource.crop_codes` looked up in ``table``), or None where it does
    not apply: no kernels, chroma steps that are not powers of two, a table that is
    not float32 or 16-bit paired samples."""
    from . import _jit

    kern = _jit.kernels()
    shifts = src.step_shifts
    if kern is None or table.dtype != np.float32 or not table.flags.c_contiguous or shifts is None:
        return None
    if src.chroma is not None and src.luma.dtype.itemsize != 1:
        return None
    if table.size < (256 if src.chroma is None and src.luma.dtype.itemsize == 1 else 65536):
        return None  # the kernel indexes the table with every code without a check
    h, w = src.shape
    vals = np.empty(h * w, np.float32)
    keys = np.empty(h * w, np.int32)
    sy, sx = shifts
    kern.gather_planes(src.luma, src.chroma, int(src.bounds[0]), int(src.bounds[2]), sy, sx,
                       _row_runs(h, w), 0, 0, table, vals, keys)
    return vals.reshape(h, w)


@functools.lru_cache(maxsize=16)
def _chroma_lookup(n: int, step: int, n_chroma: int) -> NDArray[np.int32]:
    """Chroma row (or column) of each of ``n`` luma rows: ``min(i // step, n_chroma - 1)``."""
    out = np.minimum(np.arange(n) // step, n_chroma - 1).astype(np.int32)
    out.flags.writeable = False
    return out


@functools.lru_cache(maxsize=32)
def _table_order(key: tuple[Any, ...]) -> tuple[NDArray[np.uint16], NDArray[np.float64]]:
    """Rank of every entry of ``_code_table(*key)`` and the value of every rank."""
    table = _code_table(*key)
    uniq = np.unique(table.astype(np.float64))
    rank = np.searchsorted(uniq, table.astype(np.float64)).astype(np.uint16)
    rank.flags.writeable = False
    uniq.flags.writeable = False
    return rank, uniq


def _upsample_chroma(plane: NDArray[Any], step: tuple[int, int],
                     b: tuple[int, int, int, int]) -> NDArray[Any]:
    """Chroma of luma pixels ``b`` by nearest neighbour: pixel (y, x) takes
    ``plane[min(y // sy, h - 1), min(x // sx, w - 1)]``, as :func:`_video_rgb` does."""
    import cv2

    r0, r1, c0, c1 = b
    sy, sx = step
    ph, pw = plane.shape
    q0, q1 = r0 // sy, min(-(-r1 // sy), ph)
    p0, p1 = c0 // sx, min(-(-c1 // sx), pw)
    sub = plane[q0:q1, p0:p1]
    need_h, need_w = r1 - r0, c1 - c0
    if (sy, sx) == (1, 1):
        up = sub
    else:
        up = cv2.resize(np.ascontiguousarray(sub), (sub.shape[1] * sx, sub.shape[0] * sy),
                        interpolation=cv2.INTER_NEAREST)
    oy, ox = r0 - q0 * sy, c0 - p0 * sx
    up = up[oy:oy + need_h, ox:ox + need_w]
    if up.shape != (need_h, need_w):  # past the last chroma row/column: repeat it
        up = np.pad(up, ((0, need_h - up.shape[0]), (0, need_w - up.shape[1])), mode="edge")
    return up


def code_values(frame: Frame, channel: str, transfer: TransferSpec | str = "auto", *,
                region: tuple[slice, slice] | None = None, lazy: bool = False
                ) -> CodedCrop | None:
    """The crop as codes into a table of linear values, or None where no table applies.

    Tables exist for 8-bit video (``luma``, ``red``, ``blue``; red and blue from the
    (Y', Cr) or (Y', Cb) code pair) and 8/16-bit stills with the sRGB, BT.709, gamma
    and linear transfers; ``values()`` gives exactly :func:`linear_values`.

    ``lazy``: for video, do not build the crop's codes; the result carries the decoded
    planes (``source``, a :class:`PlaneSource`) and builds them only when ``codes`` is
    read, so a reader that gathers a few pixels pays for those only.
    """
    spec = resolve_transfer(transfer, frame)
    found = _table_codes(frame, channel, spec, region, lazy=lazy)
    if found is None:
        return None
    key, codes = found
    rank, rank_value = _table_order(key)
    if isinstance(codes, PlaneSource):
        return CodedCrop(None, _code_table(*key), rank, rank_value, paired=bool(key[5]),
                         source=codes)
    return CodedCrop(codes, _code_table(*key), rank, rank_value, paired=bool(key[5]))


def _table_values(frame: Frame, channel: str, spec: TransferSpec,
                  region: tuple[slice, slice] | None) -> NDArray[np.float32] | None:
    """:func:`linear_values` by table lookup, or None where no table applies."""
    found = _table_codes(frame, channel, spec, region)
    if found is None:
        return None
    key, codes = found
    return np.take(_code_table(*key), codes)


def _table_codes(frame: Frame, channel: str, spec: TransferSpec,
                 region: tuple[slice, slice] | None, *, lazy: bool = False
                 ) -> tuple[tuple[Any, ...], NDArray[Any] | PlaneSource] | None:
    """The ``_code_table`` key and the code of every pixel of the crop, or None.
    ``lazy`` (video): a :class:`PlaneSource` instead of the codes."""
    if spec.kind not in _TABLE_TRANSFERS or channel not in CHANNELS:
        return None
    r0, r1, c0, c1 = _bounds(region, frame.shape)
    if r1 <= r0 or c1 <= c0:
        return None
    data = frame.data
    if frame.kind == "still":
        if data.dtype not in (np.uint8, np.uint16) or channel == "raw" or (
                data.ndim == 3 and channel == "luma"):
            return None
        if float(frame.max_code) != float(np.iinfo(data.dtype).max):
            return None
        key = ("still", "red", data.dtype.str, "", "", False, spec.kind, spec.gamma)
        if lazy:  # the channel as a (strided) plane
            plane = data if data.ndim == 2 else data[..., _RGB_INDEX[channel]]
            h, w = plane.shape
            return key, PlaneSource(luma=plane, chroma=None, bounds=(r0, r1, c0, c1),
                                    step=(1, 1), chroma_rows=_chroma_lookup(h, 1, h),
                                    chroma_cols=_chroma_lookup(w, 1, w))
        if data.ndim == 2:
            crop = data[r0:r1, c0:c1]
        else:  # one contiguous copy of the channel (cv2: a fast strided read)
            import cv2

            crop = cv2.extractChannel(data[r0:r1, c0:c1], _RGB_INDEX[channel])
        return key, crop
    if frame.kind != "video" or data.dtype != np.uint8 or frame.bit_depth != 8:
        return None
    if channel == "luma" or (frame.chroma is None and channel in _RGB_INDEX):
        plane = None
    elif channel not in ("red", "blue") or frame.chroma is None:
        return None
    else:
        plane = frame.chroma[1] if channel == "red" else frame.chroma[0]
        if plane.dtype != np.uint8:
            return None
    # Chroma by nearest neighbour, as in _video_rgb: pixel (y, x) uses (y // sy, x // sx).
    sy, sx = (int(v) for v in frame.chroma_step)
    h, w = data.shape
    source = PlaneSource(
        luma=data, chroma=plane, bounds=(r0, r1, c0, c1), step=(sy, sx),
        chroma_rows=_chroma_lookup(h, sy, h if plane is None else plane.shape[0]),
        chroma_cols=_chroma_lookup(w, sx, w if plane is None else plane.shape[1]))
    key = ("video", "luma" if plane is None else channel, "|u1", frame.yuv_matrix,
           frame.yuv_range, plane is not None, spec.kind, spec.gamma)
    return key, (source if lazy else source.crop_codes())


def _video_saturation_codes(frame: Frame, b: tuple[int, int, int, int], level: float
                            ) -> tuple[Any, float]:
    """Y' code from which a video pixel is saturated by its luma alone, and the Y' from
    which its R', G' or B' could reach ``level`` given the crop's chroma (inf without
    chroma); see :func:`saturation_mask`."""
    y_off, y_span, _, _ = _video_scales(frame)
    r0, r1, c0, c1 = b
    # Integer codes: code >= t exactly when code >= ceil(t) (a faster comparison).
    y_code = _code_threshold(level * (y_off + y_span), frame.data.dtype)
    y_min = (_video_candidate_luma(frame, b, level - 1e-5)
             if frame.chroma is not None and r1 > r0 and c1 > c0 else math.inf)
    return y_code, y_min


def saturation_floor(frame: Frame, *, region: tuple[slice, slice] | None = None,
                     level: float = 0.98) -> int | None:
    """For video: a Y' code below which no pixel of the crop is saturated in
    :func:`saturation_mask`'s sense (whatever its chroma, within the crop's chroma
    extremes); None for other frames. A reader that knows the Y' of the pixels it uses
    can skip the mask when all are below it."""
    if frame.kind != "video":
        return None
    if not 0.0 < level <= 1.0:
        raise InputFormatError(f"saturation level {level!r} must be in (0, 1]")
    y_code, y_min = _video_saturation_codes(frame, _bounds(region, frame.shape), level)
    floor = min(float(y_code), math.floor(y_min))
    return int(max(floor, 0)) if math.isfinite(floor) else None


def saturation_mask(frame: Frame, channel: str, *, region: tuple[slice, slice] | None = None,
                    level: float = 0.98) -> NDArray[np.bool_]:
    """Pixels at or near the encoded maximum (judged on codes, before linearisation).

    * Stills: any of R, G, B (or the grey value) >= ``level * max_code``.
    * Video: Y' >= ``level`` x the nominal peak (235 s limited, 2^n - 1 full), or any
      of R', G', B' >= ``level`` (normalised).
    * Raw: ``raw`` -> the photosite code >= ``level * white``; a colour -> any
      photosite of that colour used for the pixel's value.

    Parameters
    ----------
    level : float
        Fraction of the maximum, in (0, 1].

    Returns
    -------
    (h, w) ndarray of bool
    """
    _check_channel(channel)
    if not 0.0 < level <= 1.0:
        raise InputFormatError(f"saturation level {level!r} must be in (0, 1]")
    b = _bounds(region, frame.shape)
    r0, r1, c0, c1 = b
    if frame.kind == "video":
        luma = frame.data[r0:r1, c0:c1]
        y_code, y_min = _video_saturation_codes(frame, b, level)
        if luma.size and float(luma.max()) < min(float(y_code), math.floor(y_min)):
            return np.zeros(luma.shape, dtype=bool)  # no pixel can reach the level
        mask = np.asarray(luma >= y_code)
        if frame.chroma is not None and luma.size:
            # R', G', B' are computed only where Y' is high enough for the crop's chroma
            # extremes to lift one of them to the level (the 1e-5 margin covers the
            # float32 rounding of the values); the same values as _video_rgb there.
            cand = np.flatnonzero(luma >= math.floor(y_min))
            if cand.size:
                if cand.size > luma.size // 4:  # many candidates: the whole crop at once
                    vals = _video_rgb(frame, b, ("red", "green", "blue"))
                    for name in ("red", "green", "blue"):
                        mask |= vals[name] >= level
                else:
                    hit = np.zeros(cand.size, dtype=bool)
                    for v in _video_rgb_at(frame, b, cand):
                        hit |= v >= level
                    mask.reshape(-1)[cand[hit]] = True
        return mask
    thr = level * frame.max_code
    if frame.kind == "raw":
        if channel == "luma":
            raise InputFormatError(
                "channel 'luma' is not defined on a raw mosaic; use raw, red, green or blue",
                path=frame.source,
            )
        if channel == "raw":
            return np.asarray(frame.data[r0:r1, c0:c1] >= thr)
        codes = _raw_cells(frame, b, channel, lambda rs, cs: frame.data[rs, cs], "max")
        return np.asarray(codes >= thr)
    crop = frame.data[r0:r1, c0:c1]
    if crop.size and float(crop.max()) < thr:  # nothing near the top code
        return np.zeros(crop.shape[:2], dtype=bool)
    code = _code_threshold(thr, crop.dtype)
    if crop.ndim == 3:
        # Pixels with any channel at or above the threshold, from the flat positions of
        # the codes that are (np.any along the short last axis is much slower).
        mask = np.zeros(crop.shape[:2], dtype=bool)
        mask.reshape(-1)[np.flatnonzero(crop >= code) // crop.shape[2]] = True
        return mask
    return np.asarray(crop >= code)


# ----------------------------------------------------------------------------- darks


@dataclass(frozen=True, eq=False)
class MasterDark:
    """A combined dark frame in linear full-scale units.

    Attributes
    ----------
    level : (H, W) ndarray of float32
        The dark level to subtract.
    variance : (H, W) ndarray of float32
        Per-pixel temporal variance of one dark frame (sample variance, ddof = 1, of the
        frames kept), i.e. read noise^2 + dark shot noise; zeros from a single frame.
    level_variance : (H, W) ndarray of float32
        Variance of ``level`` itself: variance / n for a (clipped) mean, pi/2 x
        variance / n for the median (its large-sample efficiency for normal noise).
    n_frames : int
    method : {"median", "sigma_clip"}
    sigma : float or None
        Clipping threshold for ``sigma_clip``.
    exposure_s : float or None
        Exposure of the dark frames when known.
    provenance : dict
    """

    level: NDArray[np.float32]
    variance: NDArray[np.float32]
    level_variance: NDArray[np.float32]
    n_frames: int
    method: str
    sigma: float | None = None
    exposure_s: float | None = None
    provenance: Mapping[str, Any] = field(default_factory=dict)

    @property
    def shape(self) -> tuple[int, int]:
        """(H, W)."""
        return (int(self.level.shape[0]), int(self.level.shape[1]))


class _FrameStack:
    """Append-only stack of equal-shape float32 frames, spilled to disk over a budget."""

    def __init__(self, memory_bytes: int) -> None:
        self.budget = max(int(memory_bytes), 1)
        self.arrays: list[NDArray[np.float32]] = []
        self.shape: tuple[int, int] | None = None
        self.n = 0
        self._file: Any = None
        self._dir: tempfile.TemporaryDirectory[str] | None = None
        self._mm: np.memmap[Any, np.dtype[np.float32]] | None = None

    def append(self, arr: NDArray[np.float32], where: str | None) -> None:
        if self.shape is None:
            self.shape = (int(arr.shape[0]), int(arr.shape[1]))
        elif arr.shape != self.shape:
            raise ShapeMismatchError(
                f"dark frame {self.n} is {arr.shape[1]}x{arr.shape[0]} but the first is "
                f"{self.shape[1]}x{self.shape[0]}; all dark frames must share one size",
                path=where,
            )
        self.n += 1
        frame_bytes = arr.size * 4
        if self._file is None and (self.n * frame_bytes) > self.budget // 2:
            self._dir = tempfile.TemporaryDirectory(prefix="ecl_quant_dark_")
            self._file = open(os.path.join(self._dir.name, "stack.f32"), "wb")  # noqa: SIM115
            for a in self.arrays:
                self._file.write(np.ascontiguousarray(a, dtype=np.float32).tobytes())
            self.arrays = []
        if self._file is not None:
            self._file.write(np.ascontiguousarray(arr, dtype=np.float32).tobytes())
        else:
            self.arrays.append(np.array(arr, dtype=np.float32, copy=True))

    def block(self, r0: int, r1: int) -> NDArray[np.float32]:
        """(n, r1 - r0, W) rows of every frame."""
        if self._file is not None:
            if self._mm is None:
                self._file.close()
                assert self.shape is not None
                self._mm = np.memmap(self._file.name, dtype=np.float32, mode="r",
                                     shape=(self.n, *self.shape))
            return np.array(self._mm[:, r0:r1, :])
        return np.stack([a[r0:r1] for a in self.arrays])

    def close(self) -> None:
        self._mm = None
        if self._file is not None and not self._file.closed:
            self._file.close()
        if self._dir is not None:
            self._dir.cleanup()
        self.arrays = []


def _sigma_clip_block(x: NDArray[np.float64], sigma: float
                      ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Per-pixel iterative clipping around the mean, as scipy.stats.sigmaclip does.

    Returns mean, sample variance (ddof = 1) and count of the kept values.
    """
    keep = np.ones(x.shape, dtype=bool)
    count = np.full(x.shape[1:], x.shape[0], dtype=np.float64)
    while True:
        mean = np.where(keep, x, 0.0).sum(axis=0) / count
        dev = np.where(keep, x - mean, 0.0)
        std = np.sqrt((dev * dev).sum(axis=0) / count)
        new = keep & (x >= mean - sigma * std) & (x <= mean + sigma * std)
        new_count = new.sum(axis=0).astype(np.float64)
        if np.array_equal(new_count, count):
            break
        keep, count = new, new_count
    mean = np.where(keep, x, 0.0).sum(axis=0) / count
    dev = np.where(keep, x - mean, 0.0)
    ss = (dev * dev).sum(axis=0)
    var = np.where(count > 1, ss / np.maximum(count - 1, 1), 0.0)
    return mean, var, count


def _as_linear_array(item: Any, channel: str | None, transfer: TransferSpec | str | None
                     ) -> tuple[NDArray[np.float32], str | None, float | None]:
    if isinstance(item, Frame):
        if channel is None:
            raise InputFormatError("master_dark of Frame objects needs channel=")
        spec = resolve_transfer(transfer if transfer is not None else "auto", item)
        return (linearize(channel_values(item, channel), spec, channel=channel), item.source,
                item.exposure_s)
    arr = np.asarray(item)
    if arr.ndim != 2:
        raise ShapeMismatchError(f"dark frames must be 2-D arrays, got shape {arr.shape}")
    return arr.astype(np.float32, copy=False), None, None


def master_dark(
    frames: Iterable[ArrayLike | Frame],
    *,
    method: str = "median",
    sigma: float = 3.0,
    channel: str | None = None,
    transfer: TransferSpec | str | None = None,
    memory_bytes: int = DEFAULT_MEMORY_BYTES,
) -> MasterDark:
    """Combine dark frames (linear values) into a master dark, memory-bounded.

    Parameters
    ----------
    frames : iterable of (H, W) arrays or Frame
        Linear dark frames, or Frames (then ``channel`` and ``transfer`` say how to
        make them linear). Consumed once, streaming.
    method : {"median", "sigma_clip"}
        Per-pixel median, or the mean after iterative sigma clipping around the mean
        (the scipy.stats.sigmaclip rule: clip outside mean +- sigma x std (ddof 0)
        until nothing changes).
    sigma : float
        Clipping threshold for ``sigma_clip``.
    memory_bytes : int
        Budget for the frame stack; beyond half of it frames are spilled to a
        temporary file and combined in row blocks.

    Returns
    -------
    MasterDark

    Raises
    ------
    InputFormatError
        No frames, unknown method.
    ShapeMismatchError
        Frames of different sizes.
    """
    if method not in ("median", "sigma_clip"):
        raise InputFormatError(f"unknown dark method {method!r}; use median or sigma_clip")
    if method == "sigma_clip" and not (math.isfinite(sigma) and sigma > 0):
        raise InputFormatError(f"sigma must be positive, got {sigma!r}")
    stack = _FrameStack(memory_bytes)
    exposures: list[float] = []
    try:
        for item in frames:
            arr, where, exposure = _as_linear_array(item, channel, transfer)
            if exposure is not None:
                exposures.append(exposure)
            stack.append(arr, where)
        if stack.n == 0 or stack.shape is None:
            raise InputFormatError("no dark frames were given; record at least one")
        n = stack.n
        h, w = stack.shape
        level = np.empty((h, w), dtype=np.float32)
        variance = np.empty((h, w), dtype=np.float32)
        level_var = np.empty((h, w), dtype=np.float32)
        # float32 block + float64 copy + temporaries: about 6 x 4 bytes per value.
        rows = max(1, int(memory_bytes // 2 // max(1, n * w * 4 * 6)))
        for r0 in range(0, h, rows):
            r1 = min(h, r0 + rows)
            blk = stack.block(r0, r1)
            if method == "median":
                level[r0:r1] = np.median(blk, axis=0)
                if n > 1:
                    var = np.var(blk, axis=0, ddof=1, dtype=np.float64)
                    variance[r0:r1] = var
                    level_var[r0:r1] = (math.pi / 2.0) * var / n
                else:
                    variance[r0:r1] = 0.0
                    level_var[r0:r1] = 0.0
            else:
                mean, var, count = _sigma_clip_block(blk.astype(np.float64), sigma)
                level[r0:r1] = mean
                variance[r0:r1] = var
                level_var[r0:r1] = var / count
    finally:
        stack.close()
    exposure_s = float(np.median(exposures)) if exposures and len(exposures) == n else None
    prov = {"method": method, "sigma": sigma if method == "sigma_clip" else None,
            "n_frames": n, "memory_bytes": int(memory_bytes)}
    for a in (level, variance, level_var):
        a.flags.writeable = False
    return MasterDark(level=level, variance=variance, level_variance=level_var, n_frames=n,
                      method=method, sigma=sigma if method == "sigma_clip" else None,
                      exposure_s=exposure_s, provenance=prov)


def load_dark(
    path: str | Path,
    *,
    channel: str,
    transfer: TransferSpec | str,
    shape: tuple[int, int],
    method: str = "median",
    sigma: float = 3.0,
    memory_bytes: int = DEFAULT_MEMORY_BYTES,
) -> MasterDark:
    """Build a master dark from a folder of dark frames, one image, or a dark video.

    Parameters
    ----------
    path : str or Path
    channel : str
        Same channel as the measurement.
    transfer : TransferSpec or str
        Same transfer as the measurement (``auto`` is resolved on the dark recording).
    shape : (H, W)
        Size of the recording the dark will be subtracted from.

    Raises
    ------
    InputFormatError
        Unreadable dark.
    ShapeMismatchError
        The dark's size differs from ``shape``.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TimingWarning)  # dark frame times do not matter
        rec = open_recording(path)
    h, w = int(shape[0]), int(shape[1])
    if rec.shape != (h, w):
        raise ShapeMismatchError(
            f"dark frame is {rec.shape[1]}x{rec.shape[0]} but the recording is {w}x{h}; "
            "record darks at the same resolution",
            path=path,
        )
    choice = transfer_choice(transfer, rec)
    spec = parse_transfer(choice["resolved"])
    exposures: list[float | None] = []

    def linear_frames() -> Iterable[NDArray[np.float32]]:
        for fr in rec.frames():
            exposures.append(fr.exposure_s)
            yield linearize(channel_values(fr, channel), spec, channel=channel)

    dark = master_dark(linear_frames(), method=method, sigma=sigma, memory_bytes=memory_bytes)
    known = [e for e in exposures if e is not None]
    exposure_s = float(np.median(known)) if known and len(known) == len(exposures) else None
    prov = dict(dark.provenance)
    prov.update({"path": str(path), "kind": rec.kind, "channel": channel,
                 "transfer": choice, "shape": [h, w], "exposure_s": exposure_s})
    return MasterDark(level=dark.level, variance=dark.variance,
                      level_variance=dark.level_variance, n_frames=dark.n_frames,
                      method=dark.method, sigma=dark.sigma, exposure_s=exposure_s,
                      provenance=prov)


def _robust_sigma(x: NDArray[np.floating], med: float) -> float:
    dev = np.abs(x - med)
    mad = float(np.median(dev)) * _MAD_TO_SIGMA
    if mad > 0:
        return mad
    # More than half the pixels share one code (quantised dark): fall back to the mean
    # absolute deviation scaled to sigma (sqrt(pi/2) for normal data).
    return float(np.mean(dev)) * math.sqrt(math.pi / 2.0)


def hot_pixel_map(dark: MasterDark | ArrayLike, *, k: float = 8.0,
                  use: str = "level") -> NDArray[np.bool_]:
    """Pixels far above the typical dark: value > median + k x robust sigma.

    The robust sigma is the median absolute deviation times 1.4826 (normal-consistent,
    as scipy.stats.median_abs_deviation(scale="normal")).

    Parameters
    ----------
    dark : MasterDark or (H, W) array
    k : float
        Threshold in robust standard deviations.
    use : {"level", "std", "both"}
        Judge the dark level, its temporal standard deviation (flickering pixels; needs
        a MasterDark of several frames), or flag either.

    Returns
    -------
    (H, W) ndarray of bool
    """
    if not (math.isfinite(k) and k > 0):
        raise InputFormatError(f"k must be positive, got {k!r}")
    if use not in ("level", "std", "both"):
        raise InputFormatError(f"unknown use {use!r}; use level, std or both")
    sources: list[NDArray[np.floating]] = []
    if isinstance(dark, MasterDark):
        if use in ("level", "both"):
            sources.append(dark.level)
        if use in ("std", "both"):
            if dark.n_frames < 2:
                raise InputFormatError(
                    "a hot-pixel map from the temporal noise needs at least 2 dark frames")
            sources.append(np.sqrt(dark.variance))
    else:
        if use != "level":
            raise InputFormatError("use='std' needs a MasterDark, not a plain array")
        arr = np.asarray(dark, dtype=np.float64)
        if arr.ndim != 2:
            raise ShapeMismatchError(f"dark must be 2-D, got shape {arr.shape}")
        sources.append(arr)
    hot: NDArray[np.bool_] | None = None
    for x in sources:
        finite = np.isfinite(x)
        vals = np.asarray(x[finite], dtype=np.float64)
        if vals.size == 0:
            this = np.zeros(x.shape, dtype=bool)
        else:
            med = float(np.median(vals))
            sig = _robust_sigma(vals, med)
            this = finite & (x > med + k * sig)
        hot = this if hot is None else (hot | this)
    assert hot is not None
    return hot


# ----------------------------------------------------------------------------- flat, exposure


def flat_field(frames: Iterable[ArrayLike | Frame], *, dark: MasterDark | ArrayLike | None = None,
               channel: str | None = None, transfer: TransferSpec | str | None = None
               ) -> NDArray[np.float32]:
    """Normalised flat field: mean of linear flat frames minus dark, median scaled to 1.

    Streams the frames (running sum). Divide measurements by it with :func:`apply_flat`.

    Raises
    ------
    InputFormatError
        No frames, or a flat with no positive signal.
    ShapeMismatchError
        Frames or dark of different sizes.
    """
    total: NDArray[np.float64] | None = None
    n = 0
    for item in frames:
        arr, where, _ = _as_linear_array(item, channel, transfer)
        if total is None:
            total = np.zeros(arr.shape, dtype=np.float64)
        elif arr.shape != total.shape:
            raise ShapeMismatchError(
                f"flat frame {n} is {arr.shape[1]}x{arr.shape[0]} but the first is "
                f"{total.shape[1]}x{total.shape[0]}",
                path=where,
            )
        total += arr
        n += 1
    if total is None:
        raise InputFormatError("no flat frames were given")
    mean = total / n
    if dark is not None:
        level = dark.level if isinstance(dark, MasterDark) else np.asarray(dark)
        if level.shape != mean.shape:
            raise ShapeMismatchError(
                f"dark is {level.shape[1]}x{level.shape[0]} but the flat is "
                f"{mean.shape[1]}x{mean.shape[0]}; use darks of the same size")
        mean = mean - level
    positive = mean[np.isfinite(mean) & (mean > 0)]
    if positive.size == 0:
        raise InputFormatError("flat frames hold no signal above the dark; expose them "
                               "brighter")
    return (mean / float(np.median(positive))).astype(np.float32)


def apply_flat(values: ArrayLike, flat: ArrayLike, *,
               region: tuple[slice, slice] | None = None) -> NDArray[np.float32]:
    """Divide linear values by a normalised flat (the crop ``region`` of it).

    Pixels where the flat is not positive become NaN.
    """
    v = np.asarray(values, dtype=np.float32)
    f = np.asarray(flat, dtype=np.float32)
    if region is not None:
        r0, r1, c0, c1 = _bounds(region, (int(f.shape[0]), int(f.shape[1])))
        f = f[r0:r1, c0:c1]
    if f.shape != v.shape:
        raise ShapeMismatchError(
            f"flat crop is {f.shape[1]}x{f.shape[0]} but the values are "
            f"{v.shape[1]}x{v.shape[0]}; use a flat of the recording's size")
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(f > 0, v / f, np.float32(np.nan))
    return out.astype(np.float32, copy=False)


def normalise_exposure(values: ArrayLike, exposure_s: float | None, *,
                       iso: float | None = None, reference_iso: float | None = None
                       ) -> NDArray[np.float32]:
    """Linear values per second of exposure (and at ``reference_iso`` when both ISOs given).

    With ``exposure_s`` None the values are returned unchanged (as a float32 copy):
    the unit then stays "linear full-scale", not "per second".

    Raises
    ------
    InputFormatError
        Non-positive exposure or ISO.
    """
    v = np.array(values, dtype=np.float32, copy=True)
    if exposure_s is None:
        return v
    if not (math.isfinite(exposure_s) and exposure_s > 0):
        raise InputFormatError(f"exposure time must be positive, got {exposure_s!r} s")
    factor = 1.0 / float(exposure_s)
    if iso is not None and reference_iso is not None:
        if not (iso > 0 and reference_iso > 0):
            raise InputFormatError(f"ISO must be positive, got {iso!r} / {reference_iso!r}")
        factor *= float(reference_iso) / float(iso)
    v *= np.float32(factor)
    return v



def camera_noise_model(path: str | Path, *, full_scale_dn: float | None = None
                       ) -> tuple[float, float, str]:
    """Read noise and gain in linear full-scale units from an EMVA 1288 camera.json.

    With system gain K (DN/e-), temporal dark variance sigma_y.dark^2 (DN^2) and the
    full-scale code D (``max_code`` of the analysis), a pixel's variance in full-scale
    units is ``sigma_y.dark^2 / D^2 + level / (D / K)``: read variance
    ``sigma_y.dark^2 / D^2`` (FS^2) and gain ``D / K`` electrons per full scale
    (EMVA 1288 Release 4.0 Linear, Eqs. 14-15, rescaled by D). Valid for recordings of
    the same linear readout (raw or linear 16-bit) at the same ISO.

    Parameters
    ----------
    path : str or Path
        camera.json written by ``ecl-quant camera``.
    full_scale_dn : float, optional
        Full-scale code D; default: the ``max_code`` recorded in the file.

    Returns
    -------
    read_var : float
        FS^2 per frame.
    gain : float
        Electrons per full scale.
    source : str
        A description for run.json.

    Raises
    ------
    InputFormatError
        Not a readable camera.json, or its gain, dark variance or full scale is missing.
    """
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as err:
        raise InputFormatError(f"not a readable camera.json ({err}); write one with "
                               "'ecl-quant camera FOLDER --out DIR'", path=p) from err
    if not isinstance(doc, dict) or doc.get("standard", "").find("EMVA 1288") < 0:
        raise InputFormatError("not a camera.json of 'ecl-quant camera' (no EMVA 1288 "
                               "figures)", path=p)
    prov = doc.get("provenance") if isinstance(doc.get("provenance"), dict) else {}
    k, var = doc.get("system_gain_dn_per_e"), doc.get("dark_variance_dn2")
    d = full_scale_dn if full_scale_dn is not None else prov.get("max_code")
    for name, value in (("system_gain_dn_per_e", k), ("dark_variance_dn2", var),
                        ("max_code (full scale)", d)):
        if not isinstance(value, (int, float)) or isinstance(value, bool) \
                or not np.isfinite(value) or value < 0 or (name != "dark_variance_dn2"
                                                           and value == 0):
            raise InputFormatError(f"{name} is missing or not a positive number; rerun "
                                   "'ecl-quant camera' (with --max-code for the full scale)",
                                   path=p)
    read_var = float(var) / float(d) ** 2
    gain = float(d) / float(k)
    return read_var, gain, (f"camera profile {p.name}: K = {float(k):.4g} DN/e-, "
                            f"sigma_y.dark^2 = {float(var):.4g} DN^2, full scale {float(d):g} DN")
