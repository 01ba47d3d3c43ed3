"""Frame sources: image folders, file lists, videos and raw DNG stills.

Every source is a generator of :class:`Frame` objects that opens and closes what it
needs as it goes, so memory does not grow with the length of a recording.

:func:`open_recording` looks at a source once (file headers, EXIF, the first video
frame) and returns a :class:`Recording`; ``Recording.frames()`` then decodes lazily.

Conventions
-----------
* Stills (JPEG, PNG, TIFF; 8 or 16 bit) keep their encoded codes, RGB channel order,
  EXIF Orientation applied. Names are sorted naturally (``img2`` before ``img10``).
* Video keeps the decoder's raw planes: Y' in ``Frame.data``, (Cb, Cr) in
  ``Frame.chroma``; nothing is converted to RGB here (see :mod:`ecl_quant.radiometry`).
  Rotation tags (display matrix) are applied to every plane with ``np.rot90``.
* Raw DNG keeps the visible Bayer mosaic, untouched (no demosaic, no white balance, no
  brightening), with its black level per photosite and white level.
* Frame arrays are read-only views: copy before modifying.

Times
-----
Video: the presentation timestamp of each frame (PyAV ``frame.time``) minus the first
frame's, so variable-frame-rate recordings are timed correctly. Stills: EXIF
DateTimeOriginal + SubSecTimeOriginal when every file has them; otherwise the ``fps``
argument; otherwise the frame index (1 s apart) with a :class:`TimingWarning`.
``Recording.metadata["time_source"]`` records which was used.
"""

from __future__ import annotations

import math
import re
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from .errors import (
    IncompleteRecordingWarning,
    InputFormatError,
    ShapeMismatchError,
    TimingWarning,
)

__all__ = [
    "Frame",
    "ExifInfo",
    "Recording",
    "open_recording",
    "iter_frames",
    "read_exif",
    "natural_key",
    "DEFAULT_MAX_PIXELS",
    "STILL_SUFFIXES",
    "RAW_SUFFIXES",
    "VIDEO_SUFFIXES",
]

FrameKind = Literal["still", "video", "raw"]
RecordingKind = Literal["stills", "video", "raw"]

#: Largest image (width x height) read without complaint; guards against
#: decompression bombs (a small file that claims a huge size).
DEFAULT_MAX_PIXELS = 100_000_000

STILL_SUFFIXES = (".jpg", ".jpeg", ".png", ".tif", ".tiff")
RAW_SUFFIXES = (".dng",)
VIDEO_SUFFIXES = (".mp4", ".mov", ".m4v", ".avi", ".mkv", ".webm", ".3gp")
#: Frames decoded ahead of the consumer on one background thread (Pillow, OpenCV,
#: LibRaw and FFmpeg release the GIL while they decode, so decoding the next frame
#: overlaps the processing of this one; for video it keeps FFmpeg's decoder threads
#: fed); 0 decodes in the consumer's thread.
READ_AHEAD = 2
#: FFmpeg decoder threading of videos: "AUTO" (frame and slice threads on every core) or
#: "NONE" (one thread: the least CPU per frame, for processes that already fill the
#: cores, such as the workers of a parallel batch).
VIDEO_THREAD_TYPE = "AUTO"


def use_one_core() -> None:
    """Decode in the calling thread only (no read-ahead, one decoder thread): for worker
    processes that run side by side on every core, where extra threads only contend."""
    global READ_AHEAD, VIDEO_THREAD_TYPE
    READ_AHEAD = 0
    VIDEO_THREAD_TYPE = "NONE"

# EXIF tag numbers (EXIF 2.32 / TIFF 6.0).
_TAG_ORIENTATION = 0x0112
_TAG_MAKE = 0x010F
_TAG_MODEL = 0x0110
_TAG_EXIF_IFD = 0x8769
_TAG_EXPOSURE_TIME = 0x829A
_TAG_ISO_SPEED_RATINGS = 0x8827
_TAG_ISO_SPEED = 0x8833
_TAG_DATETIME_ORIGINAL = 0x9003
_TAG_DATETIME_DIGITIZED = 0x9004
_TAG_SUBSEC_ORIGINAL = 0x9291
_TAG_SUBSEC_DIGITIZED = 0x9292
_TAG_BITS_PER_SAMPLE = 0x0102
_TAG_DNG_VERSION = 0xC612  # DNG 1.6 specification: required in IFD0 of every DNG

# FFmpeg AVColorSpace values -> our matrix names. 2 = unspecified.
_AV_COLORSPACE = {1: "bt709", 5: "bt601", 6: "bt601", 9: "bt2020", 10: "bt2020"}
# FFmpeg AVColorTransferCharacteristic values -> names (for provenance and HDR checks).
_AV_TRC = {
    1: "bt709",
    4: "gamma22",
    5: "gamma28",
    6: "smpte170m",
    7: "smpte240m",
    8: "linear",
    13: "iec61966-2-1",
    14: "bt2020-10",
    15: "bt2020-12",
    16: "smpte2084",
    18: "arib-std-b67",
}
_AV_RANGE_FULL = 2  # AVCOL_RANGE_JPEG

# Planar Y'CbCr pixel formats read straight from the decoder's planes.
_PLANAR_YUV = re.compile(r"^yuvj?4[0-4][0-4]p(?:(9|10|12|14|16)le)?$")
_GRAY = re.compile(r"^gray(?:(9|10|12|14|16)le)?$")


@dataclass(frozen=True, eq=False)
class Frame:
    """One decoded frame, still in encoded code values.

    Attributes
    ----------
    index : int
        0-based position in the recording.
    time_s : float
        Presentation time in seconds from the first frame (true timestamp, not index/fps).
    data : (H, W) or (H, W, 3) ndarray of uint8 or uint16
        Stills: grey or RGB codes. Video: the luma plane Y' (H, W). Raw: the Bayer mosaic.
    max_code : float
        Full-scale code (255, 65535, or the DNG white level).
    source : str
        File the frame came from.
    kind : {"still", "video", "raw"}
    exposure_s : float or None
        Exposure time in seconds when known (EXIF ExposureTime).
    iso : float or None
        ISO speed when known (EXIF ISOSpeedRatings).
    chroma : tuple of two (h, w) ndarrays, or None
        Video only: the (Cb, Cr) planes, subsampled by ``chroma_step``.
    chroma_step : (int, int)
        Chroma subsampling factors (rows, columns); (2, 2) for 4:2:0.
    yuv_matrix : {"bt601", "bt709", "bt2020"}
        Video only: the Y'CbCr matrix the stream is tagged with (untagged -> bt601).
    yuv_range : {"limited", "full"}
        Video only: code range of Y'CbCr.
    black_level : float or (H, W) ndarray
        Raw only: black level per photosite, in codes (a float when it is the same for
        every photosite).
    cfa : (H, W) ndarray of uint8 or None
        Raw only: colour index per photosite (0 = R, 1 = G, 2 = B, 3 = G2).
    bit_depth : int
        Bits per code value.
    transfer_tag : str or None
        Video only: the transfer characteristic the stream is tagged with (FFmpeg name,
        e.g. "bt709", "arib-std-b67" for HLG), None when untagged.
    """

    index: int
    time_s: float
    data: NDArray[np.generic]
    max_code: float
    source: str
    kind: FrameKind = "still"
    exposure_s: float | None = None
    iso: float | None = None
    chroma: tuple[NDArray[np.generic], NDArray[np.generic]] | None = None
    chroma_step: tuple[int, int] = (1, 1)
    yuv_matrix: str = "bt601"
    yuv_range: str = "limited"
    black_level: float | NDArray[np.generic] = 0.0
    cfa: NDArray[np.uint8] | None = None
    bit_depth: int = 8
    transfer_tag: str | None = None

    @property
    def shape(self) -> tuple[int, int]:
        """(H, W) of the frame in pixels."""
        return (int(self.data.shape[0]), int(self.data.shape[1]))


@dataclass(frozen=True)
class ExifInfo:
    """The EXIF fields the pipeline uses; None where a tag is absent.

    Attributes
    ----------
    exposure_s : float or None
        ExposureTime (0x829A) in seconds.
    iso : float or None
        ISOSpeedRatings (0x8827), else ISOSpeed (0x8833).
    datetime_original : datetime or None
        DateTimeOriginal (0x9003) plus SubSecTimeOriginal (0x9291) as microseconds
        (DateTimeDigitized when the original is missing). Naive local time, as stored.
    orientation : int
        Orientation (0x0112), 1..8; 1 when absent or invalid.
    has_subsec : bool
        Whether a sub-second field was present.
    make, model : str or None
        Camera maker and model (IFD0), for provenance.
    """

    exposure_s: float | None = None
    iso: float | None = None
    datetime_original: datetime | None = None
    orientation: int = 1
    has_subsec: bool = False
    make: str | None = None
    model: str | None = None


def natural_key(name: str | Path) -> tuple[Any, ...]:
    """Sort key that orders digit runs by value: ``img2`` before ``img10``.

    Case-insensitive; ties are broken by the exact name so the order is total.
    """
    text = Path(name).name
    parts = re.split(r"(\d+)", text.lower())
    key = tuple(int(p) if i % 2 else p for i, p in enumerate(parts))
    return (key, text)


# ----------------------------------------------------------------------------- EXIF


def _rational_to_float(value: Any) -> float | None:
    if value is None:
        return None
    if isinstance(value, (tuple, list)):
        if not value:
            return None
        if len(value) == 2 and all(isinstance(v, int) for v in value):
            num, den = value
            return None if den == 0 else num / den
        value = value[0]
    try:
        out = float(value)
    except (TypeError, ValueError, ZeroDivisionError):
        return None
    return out if math.isfinite(out) and out > 0 else None


def _parse_exif_datetime(text: Any, subsec: Any) -> tuple[datetime | None, bool]:
    if not isinstance(text, str):
        return None, False
    text = text.strip("\x00 ").strip()
    try:
        dt = datetime.strptime(text[:19], "%Y:%m:%d %H:%M:%S")
    except ValueError:
        return None, False
    if isinstance(subsec, bytes):
        subsec = subsec.decode("ascii", "ignore")
    digits = re.sub(r"\D", "", str(subsec)) if subsec is not None else ""
    if not digits:
        return dt, False
    micro = int(round(float("0." + digits) * 1_000_000))
    micro = min(micro, 999_999)
    return dt.replace(microsecond=micro), True


def _exif_from_tags(base: Mapping[int, Any], sub: Mapping[int, Any]) -> ExifInfo:
    def get(tag: int) -> Any:
        value = sub.get(tag)
        return base.get(tag) if value is None else value

    exposure = _rational_to_float(get(_TAG_EXPOSURE_TIME))
    iso_raw = get(_TAG_ISO_SPEED_RATINGS)
    if iso_raw is None or iso_raw == 0 or iso_raw == ():
        iso_raw = get(_TAG_ISO_SPEED)
    iso = _rational_to_float(iso_raw)
    dt, has_subsec = _parse_exif_datetime(get(_TAG_DATETIME_ORIGINAL), get(_TAG_SUBSEC_ORIGINAL))
    if dt is None:
        dt, has_subsec = _parse_exif_datetime(
            get(_TAG_DATETIME_DIGITIZED), get(_TAG_SUBSEC_DIGITIZED)
        )
    orientation = base.get(_TAG_ORIENTATION, 1)
    try:
        orientation = int(orientation[0] if isinstance(orientation, tuple) else orientation)
    except (TypeError, ValueError, IndexError):
        orientation = 1
    if orientation not in range(1, 9):
        orientation = 1

    def text(tag: int) -> str | None:
        v = base.get(tag)
        return v.strip("\x00 ").strip() or None if isinstance(v, str) else None

    return ExifInfo(
        exposure_s=exposure,
        iso=iso,
        datetime_original=dt,
        orientation=orientation,
        has_subsec=has_subsec,
        make=text(_TAG_MAKE),
        model=text(_TAG_MODEL),
    )


def _read_tiff_ifd_tags(path: Path) -> tuple[dict[int, Any], dict[int, Any]] | None:
    """IFD0 and Exif-IFD tags of a TIFF-structured file (DNG) Pillow cannot open."""
    from PIL import TiffImagePlugin

    try:
        with open(path, "rb") as fp, warnings.catch_warnings():
            warnings.simplefilter("ignore")  # damaged tags read as missing
            head = fp.read(8)
            if head[:4] not in (b"II*\x00", b"MM\x00*"):
                return None
            ifd = TiffImagePlugin.ImageFileDirectory_v2(head)
            fp.seek(ifd.next)
            ifd.load(fp)
            base = {int(k): ifd[k] for k in ifd}
            sub: dict[int, Any] = {}
            offset = base.get(_TAG_EXIF_IFD)
            if isinstance(offset, int) and offset > 0:
                sub_ifd = TiffImagePlugin.ImageFileDirectory_v2(head)
                fp.seek(offset)
                sub_ifd.load(fp)
                sub = {int(k): sub_ifd[k] for k in sub_ifd}
    except (OSError, ValueError, KeyError, SyntaxError, EOFError):
        return None
    return base, sub


def read_exif(path: str | Path) -> ExifInfo:
    """Read exposure, ISO, capture time and orientation from a still's EXIF.

    Works for JPEG, PNG (eXIf chunk), TIFF and DNG (parsed as TIFF when Pillow cannot
    decode it). Tags missing from the file come back as None.

    Parameters
    ----------
    path : str or Path
        Image file.

    Returns
    -------
    ExifInfo

    Raises
    ------
    InputFormatError
        If the file is missing or is not an image Pillow can identify (and not a TIFF).
    """
    from PIL import ExifTags, Image, UnidentifiedImageError

    p = Path(path)
    if not p.is_file():
        raise InputFormatError("file not found; check the path", path=p)
    try:
        with warnings.catch_warnings():
            # Pillow warns about damaged metadata and large images; the size limit is
            # ours, and damaged tags simply read as missing.
            warnings.simplefilter("ignore")
            with Image.open(p) as im:
                exif = im.getexif()
                base = {int(k): v for k, v in exif.items()}
                sub = {int(k): v for k, v in exif.get_ifd(ExifTags.IFD.Exif).items()}
    except (UnidentifiedImageError, Image.DecompressionBombError) as err:
        tags = _read_tiff_ifd_tags(p)
        if tags is None:
            raise InputFormatError(
                "not an image file that can be read; check the file or export it as "
                "JPEG, PNG, TIFF or DNG",
                path=p,
            ) from err
        base, sub = tags
    except OSError as err:
        raise InputFormatError(f"cannot read EXIF ({err}); check the file", path=p) from err
    return _exif_from_tags(base, sub)


def _apply_orientation(arr: NDArray[Any], orientation: int) -> NDArray[Any]:
    """Apply EXIF Orientation (TIFF 6.0 / EXIF 2.32 tag 0x0112) to the first two axes."""
    if orientation == 2:
        return arr[:, ::-1]
    if orientation == 3:
        return arr[::-1, ::-1]
    if orientation == 4:
        return arr[::-1]
    if orientation == 5:
        return np.swapaxes(arr, 0, 1)
    if orientation == 6:
        return np.rot90(arr, k=-1)
    if orientation == 7:
        return np.swapaxes(arr[::-1, ::-1], 0, 1)
    if orientation == 8:
        return np.rot90(arr, k=1)
    return arr


# ----------------------------------------------------------------------------- headers


@dataclass(frozen=True)
class _StillHeader:
    path: str
    width: int  # after orientation
    height: int
    bit_depth: int
    channels: int  # 1 or 3 (alpha dropped), best guess from the header
    fmt: str
    exif: ExifInfo


def _check_pixels(width: int, height: int, max_pixels: int, path: Path) -> None:
    if width * height > max_pixels:
        raise InputFormatError(
            f"image claims {width}x{height} pixels ({width * height / 1e6:.1f} megapixels), "
            f"more than the limit of {max_pixels / 1e6:.1f} megapixels; this guards against "
            "decompression bombs: downscale the image or pass a larger max_pixels",
            path=path,
        )


def _png_bit_depth(path: Path) -> int | None:
    try:
        with open(path, "rb") as fh:
            head = fh.read(26)
    except OSError:
        return None
    if len(head) >= 25 and head[:8] == b"\x89PNG\r\n\x1a\n" and head[12:16] == b"IHDR":
        return int(head[24])
    return None


def _read_still_header(path: Path, max_pixels: int) -> _StillHeader:
    from PIL import ExifTags, Image, UnidentifiedImageError

    if not path.is_file():
        raise InputFormatError("file not found; check the path", path=path)
    _check_not_empty(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # see read_exif
            with Image.open(path) as im:
                width, height = im.size
                fmt = str(im.format or "")
                mode = im.mode
                # Refuse on the header alone, before anything reads further.
                _check_pixels(width, height, max_pixels, path)
                exif = im.getexif()
                base = {int(k): v for k, v in exif.items()}
                sub = {int(k): v for k, v in exif.get_ifd(ExifTags.IFD.Exif).items()}
                bits_tag = None
                if fmt == "TIFF":
                    tags = getattr(im, "tag_v2", {})
                    bits_tag = tags.get(_TAG_BITS_PER_SAMPLE)
                    # Stored (unrotated) size: Pillow may already report it oriented.
                    width = int(tags.get(256, width))
                    height = int(tags.get(257, height))
    except Image.DecompressionBombError as err:
        raise InputFormatError(
            f"image is larger than the limit of {max_pixels / 1e6:.1f} megapixels "
            f"({err}); this guards against decompression bombs: downscale the image",
            path=path,
        ) from err
    except UnidentifiedImageError as err:
        raise InputFormatError(
            "not a readable JPEG, PNG or TIFF image (damaged, or another format under "
            "an image name); re-export the image",
            path=path,
        ) from err
    except (OSError, ValueError, SyntaxError, EOFError) as err:  # Pillow's damage reports
        raise InputFormatError(f"cannot read the image header ({err}); check the file",
                               path=path) from err
    _check_pixels(width, height, max_pixels, path)
    info = _exif_from_tags(base, sub)
    if fmt == "PNG":
        bit_depth = 16 if (_png_bit_depth(path) or 8) > 8 else 8
    elif fmt == "TIFF":
        bits = bits_tag if isinstance(bits_tag, tuple) else (bits_tag or 8,)
        bit_depth = 16 if max(int(b) for b in bits) > 8 else 8
    else:
        bit_depth = 16 if mode.startswith("I;16") else 8
    channels = 1 if mode in ("L", "1", "I;16", "I;16B", "I;16L", "I", "F", "LA") else 3
    if info.orientation in (5, 6, 7, 8):
        width, height = height, width
    return _StillHeader(str(path), width, height, bit_depth, channels, fmt, info)


# ----------------------------------------------------------------------------- decoding


def _check_png_chunks(data: memoryview, path: Path) -> None:
    """Walk a PNG's chunks and verify each CRC-32 (PNG specification, section 5.3).

    Damage is reported here as an InputFormatError; left to libpng it would also be
    printed on the process's stderr, outside the CLI's one-line error.
    """
    import zlib

    pos, n = 8, len(data)
    while pos < n:
        if pos + 12 > n:
            break
        length = int.from_bytes(data[pos:pos + 4], "big")
        end = pos + 12 + length
        if end > n:
            break
        kind = bytes(data[pos + 4:pos + 8])
        if zlib.crc32(data[pos + 4:pos + 8 + length]) != int.from_bytes(data[end - 4:end], "big"):
            raise InputFormatError(
                f"PNG chunk {kind.decode('latin-1')!r} fails its CRC-32 check: the file is "
                "damaged: copy it again or remove it",
                path=path,
            )
        if kind == b"IEND":
            return
        pos = end
    raise InputFormatError(
        "PNG is truncated (it ends before its IEND chunk): copy it again or remove it",
        path=path,
    )


def _jpeg_error(path: Path, err: Exception) -> InputFormatError:
    return InputFormatError(
        f"JPEG cannot be decoded ({err}); the file is truncated or damaged: copy "
        "it again from the camera or remove it",
        path=path,
    )


def _open_still(header: _StillHeader) -> tuple[_StillHeader, Any]:
    """First half of decoding a still, run in the consumer's thread: open the JPEG
    (Pillow parses its header and may warn, and warning filters are process-wide, not
    per thread) or read and check the PNG/TIFF bytes."""
    from PIL import Image

    path = Path(header.path)
    if header.fmt in ("JPEG", "MPO"):
        # Pillow reports truncated JPEGs as OSError; OpenCV would fill them with grey.
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # see read_exif
                return header, Image.open(path)
        except (OSError, ValueError, SyntaxError) as err:
            raise _jpeg_error(path, err) from err
    try:
        buf = np.fromfile(path, dtype=np.uint8)
    except OSError as err:
        raise InputFormatError(f"cannot read the file ({err})", path=path) from err
    if header.fmt == "PNG":
        _check_png_chunks(memoryview(buf), path)
    return header, buf


def _prepare_still(header: _StillHeader) -> tuple[_StillHeader, Any]:
    """:func:`_open_still` in the consumer's thread, except for a plain JPEG within
    Pillow's pixel limit: Pillow's open then has nothing to warn about (its warnings come
    from MPO headers and oversized images), so the worker opens it (``None`` handle)."""
    from PIL import Image

    if header.fmt == "JPEG" and header.width * header.height <= (Image.MAX_IMAGE_PIXELS or 0):
        return header, None
    return _open_still(header)


def _decode_opened(opened: tuple[_StillHeader, Any]) -> NDArray[Any]:
    """Decode an opened still (:func:`_open_still`) to (H, W) or (H, W, 3) uint8/uint16
    RGB, orientation applied. Thread-safe: no warning filters touched."""
    import cv2
    from PIL import Image

    header, handle = opened
    path = Path(header.path)
    if header.fmt in ("JPEG", "MPO"):
        try:
            if handle is None:  # see _prepare_still; a warning raised as an error (strict
                # filters) means a file that changed since its header was read
                handle = Image.open(path, formats=("JPEG",))
        except (OSError, ValueError, SyntaxError, Warning) as err:
            raise _jpeg_error(path, err) from err
        try:
            with handle as im:
                if im.mode not in ("L", "RGB"):
                    im = im.convert("RGB")
                arr = np.asarray(im)
        except (OSError, ValueError, SyntaxError) as err:
            raise _jpeg_error(path, err) from err
    else:
        arr = cv2.imdecode(handle, cv2.IMREAD_UNCHANGED)
        if arr is None:
            raise InputFormatError(
                f"{header.fmt or 'image'} cannot be decoded; the file is truncated or "
                "damaged: copy it again or remove it",
                path=path,
            )
        if arr.ndim == 3:
            if arr.shape[2] == 4:
                arr = cv2.cvtColor(arr, cv2.COLOR_BGRA2RGB)
            elif arr.shape[2] == 3:
                arr = cv2.cvtColor(arr, cv2.COLOR_BGR2RGB)
            elif arr.shape[2] == 1:
                arr = arr[:, :, 0]
            else:
                raise InputFormatError(
                    f"image has {arr.shape[2]} channels; save it as grey or RGB", path=path
                )
    if arr.dtype not in (np.uint8, np.uint16):
        raise InputFormatError(
            f"image samples are {arr.dtype}; only 8- and 16-bit integer images are "
            "supported: export as 8- or 16-bit",
            path=path,
        )
    if header.fmt != "TIFF":
        # OpenCV's TIFF decoder applies the TIFF Orientation tag itself (checked against
        # all eight cases); JPEG (Pillow) and PNG (IMREAD_UNCHANGED) come unrotated.
        arr = _apply_orientation(arr, header.exif.orientation)
    arr.flags.writeable = False
    return arr


def _warn_here(message: str, category: type[Warning]) -> None:
    warnings.warn(message, category, stacklevel=3)


def _decoded_ahead(make: Callable[[Callable[[str, type[Warning]], None]], Iterator[Any]],
                   depth: int) -> Iterator[Any]:
    """The items of the generator ``make(warn)``, produced on a background thread up to
    ``depth`` items ahead of the consumer (video: FFmpeg's decoder threads then always
    have packets to work on while the consumer measures the previous frame; PyAV
    releases the GIL while it decodes).

    Warnings the generator gives through ``warn`` are issued in the consumer's thread at
    their place in the sequence (warning filters are process-wide state); an exception
    is raised there after the items before it. Closing this generator early stops the
    producer and waits for it, so the source is closed when this returns.
    """
    import queue
    import threading

    done = object()
    q: queue.Queue[tuple[str, Any]] = queue.Queue(maxsize=max(1, depth))
    stop = threading.Event()

    def put(kind: str, value: Any) -> bool:
        while not stop.is_set():
            try:
                q.put((kind, value), timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def produce() -> None:
        try:
            gen = make(lambda message, category: put("warning", (message, category)))
            try:
                for item in gen:
                    if not put("item", item):
                        return
            finally:
                close = getattr(gen, "close", None)
                if close is not None:
                    close()
            put("end", done)
        except BaseException as err:  # handed to the consumer
            put("error", err)

    worker = threading.Thread(target=produce, name="ecl-quant-decode", daemon=True)
    worker.start()
    try:
        while True:
            kind, value = q.get()
            if kind == "item":
                yield value
            elif kind == "warning":
                warnings.warn(value[0], value[1], stacklevel=2)
            elif kind == "error":
                raise value
            else:
                return
    finally:
        stop.set()
        worker.join()


def _read_ahead(decode: Any, items: Sequence[Any], depth: int | None = None, *,
                prepare: Any = None) -> Iterator[tuple[Any, Any]]:
    """``(item, decode(prepare(item)))`` in order, with up to ``depth`` decodes ahead.

    One background thread decodes while the consumer works on the previous result, so
    at most ``depth + 1`` decoded frames exist at a time. ``prepare`` (default: none)
    runs in the consumer's thread when an item is queued: anything that touches
    process-wide state such as warning filters belongs there; what it returns is
    closed (if it can be) when its decode is cancelled. An exception from either is
    raised where its item would have been yielded (the frames before it come out
    first, as without read-ahead). Closing the generator early cancels what was queued
    and waits for the decode in progress. ``depth`` 0 (or one item) decodes inline.
    """
    depth = READ_AHEAD if depth is None else int(depth)

    def prep(item: Any) -> Any:
        return item if prepare is None else prepare(item)

    if depth <= 0 or len(items) <= 1:
        for item in items:
            yield item, decode(prep(item))
        return
    from collections import deque
    from concurrent.futures import Future, ThreadPoolExecutor

    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ecl-quant-read")
    pending: deque[tuple[Future[Any], Any]] = deque()
    try:
        nxt = 0
        for item in items:
            while nxt < len(items) and len(pending) < depth + 1:
                fut: Future[Any]
                try:
                    ready = prep(items[nxt])
                    fut = pool.submit(decode, ready)
                except Exception as err:  # raised in order, once the earlier items are out
                    ready, fut = None, Future()
                    fut.set_exception(err)
                    nxt = len(items)
                    pending.append((fut, ready))
                    break
                pending.append((fut, ready))
                nxt += 1
            fut, _ = pending.popleft()
            yield item, fut.result()
    finally:
        for fut, _ in pending:
            fut.cancel()
        pool.shutdown(wait=True)
        for fut, ready in pending:
            handle = ready[-1] if isinstance(ready, tuple) else ready
            if fut.cancelled() and hasattr(handle, "close"):
                handle.close()  # opened but never decoded: release the file


# ----------------------------------------------------------------------------- Recording


@dataclass(frozen=True, eq=False)
class Recording:
    """A recording opened for streaming: its description plus a frame generator.

    Attributes
    ----------
    path : str
        The folder, the video or the single image; for a list of files, the folder
        of the first file.
    kind : {"stills", "video", "raw"}
    n_frames : int or None
        Number of frames, None when the container does not say.
    shape : (int, int)
        (H, W) of every frame, after rotation/orientation.
    metadata : dict
        JSON-serialisable description. Video: container, codec, profile, pix_fmt,
        bit_rate, rotation, time_base, average_rate, guessed_rate, fps, n_frames,
        duration_s, yuv_matrix, yuv_range, color_trc, chroma_step, bit_depth. Stills and
        raw: format, n_files, bit_depth, fps, exposures_s, isos, orientation, make,
        model (raw: white_level). Always time_source ("pts", "exif", "fps", "index").
    bit_depth : int
        Bits per code value (8, 16, 10, ... or the DNG's significant bits).
    files : tuple of str
        Stills/raw: the files in frame order. Video: the one file.
    """

    path: str
    kind: RecordingKind
    n_frames: int | None
    shape: tuple[int, int]
    metadata: Mapping[str, Any]
    bit_depth: int = 8
    files: tuple[str, ...] = ()
    _headers: tuple[_StillHeader, ...] = field(default=(), repr=False)
    _times_s: tuple[float, ...] = field(default=(), repr=False)
    _fps: float | None = field(default=None, repr=False)
    _max_pixels: int = field(default=DEFAULT_MAX_PIXELS, repr=False)

    def frames(self, *, key_only: bool = False) -> Iterator[Frame]:
        """A fresh generator of the recording's frames, decoded one at a time.

        Parameters
        ----------
        key_only : bool, optional
            Video only: decode just the key (intra-coded) frames, which need no other
            frame (FFmpeg ``skip_frame=NONKEY``): a sparse sample at a small fraction
            of the cost. Their ``index`` counts the key frames; ``time_s`` is their true
            time. Stills and raw recordings yield every frame.

        Raises
        ------
        InputFormatError
            A file cannot be decoded.
        ShapeMismatchError
            A frame differs in size, channels or bit depth from the first one.
        """
        if self.kind == "stills":
            return self._still_frames()
        if self.kind == "raw":
            return self._raw_frames()
        return self._video_frames(key_only=key_only)

    def __iter__(self) -> Iterator[Frame]:
        return self.frames()

    # -- stills
    def _still_frames(self) -> Iterator[Frame]:
        first: tuple[tuple[int, ...], np.dtype[Any], str] | None = None
        stills = _read_ahead(_decode_opened, self._headers, prepare=_prepare_still)
        try:
            for i, (header, arr) in enumerate(stills):
                if first is None:
                    first = (arr.shape, arr.dtype, header.path)
                    if arr.shape[:2] != self.shape:
                        raise ShapeMismatchError(
                            f"decoded size {arr.shape[1]}x{arr.shape[0]} differs from the "
                            f"header's {self.shape[1]}x{self.shape[0]}; re-export the image",
                            path=header.path,
                        )
                else:
                    _check_same(arr, first, header.path)
                yield Frame(
                    index=i,
                    time_s=self._times_s[i],
                    data=arr,
                    max_code=float(np.iinfo(arr.dtype).max),
                    source=header.path,
                    kind="still",
                    exposure_s=header.exif.exposure_s,
                    iso=header.exif.iso,
                    bit_depth=8 * arr.dtype.itemsize,
                )
        finally:
            stills.close()

    # -- raw
    def _raw_frames(self) -> Iterator[Frame]:
        first: tuple[tuple[int, ...], np.dtype[Any], str] | None = None
        limit = self._max_pixels
        dngs = _read_ahead(lambda h: _read_dng(Path(h.path), limit), self._headers)
        try:
            for i, (header, (mosaic, cfa, black, white, _other)) in enumerate(dngs):
                if first is None:
                    first = (mosaic.shape, mosaic.dtype, header.path)
                else:
                    _check_same(mosaic, first, header.path)
                yield Frame(
                    index=i,
                    time_s=self._times_s[i],
                    data=mosaic,
                    max_code=float(white),
                    source=header.path,
                    kind="raw",
                    exposure_s=header.exif.exposure_s,
                    iso=header.exif.iso,
                    black_level=black,
                    cfa=cfa,
                    bit_depth=self.bit_depth,
                )
        finally:
            dngs.close()

    # -- video
    def _video_frames(self, *, key_only: bool = False) -> Iterator[Frame]:
        if READ_AHEAD <= 0:
            return self._decode_video(key_only=key_only, warn=_warn_here)
        return _decoded_ahead(
            lambda warn: self._decode_video(key_only=key_only, warn=warn), READ_AHEAD)

    def _decode_video(self, *, key_only: bool,
                      warn: Callable[[str, type[Warning]], None]) -> Iterator[Frame]:
        import av

        path = Path(self.path)
        container = _open_container(path)
        try:
            stream = container.streams.video[0]
            stream.thread_type = VIDEO_THREAD_TYPE
            if VIDEO_THREAD_TYPE == "NONE":
                stream.thread_count = 1
            if key_only:
                stream.codec_context.skip_frame = "NONKEY"
            t0: float | None = None
            t_prev = -math.inf
            fallback_rate = self._fps or _float_or_none(self.metadata.get("average_rate"))
            warned = False
            index = 0
            decoded = container.decode(stream)
            while True:
                try:
                    fr = next(decoded)
                except StopIteration:
                    listed = self.n_frames
                    if not key_only and listed and listed - index > max(2, 0.01 * listed):
                        # A fast-start MP4 keeps its index at the front: cut short, it
                        # still opens and simply ends early.
                        warn(
                            f"{path}: the video ends after {index} of the {listed} frames "
                            "its index lists: the file was cut short (copy it again from "
                            "the phone); only the frames present are measured",
                            IncompleteRecordingWarning,
                        )
                    break
                except av.FFmpegError as err:
                    raise InputFormatError(
                        f"video cannot be decoded after frame {index} ({err}); the file "
                        "is damaged or incomplete: copy it again from the phone",
                        path=path,
                    ) from err
                t = fr.time
                if t is None:
                    rate = fallback_rate or 1.0
                    if not warned:
                        warn(
                            f"{path}: video frames carry no timestamps; assuming "
                            f"{rate:g} frames per second",
                            TimingWarning,
                        )
                        warned = True
                    t = index / rate
                if t0 is None:
                    t0 = float(t)
                elif float(t) < t_prev:
                    raise InputFormatError(
                        f"frame {index} is stamped {float(t) - t0:.3f} s, before frame "
                        f"{index - 1} ({t_prev - t0:.3f} s): the timestamps go backwards, so "
                        "the file is damaged or badly muxed: re-encode it, or record again",
                        path=path,
                    )
                t_prev = float(t)
                planes = _video_planes(fr, path)
                if planes.y.shape != self.shape:
                    raise ShapeMismatchError(
                        f"frame {index} is {planes.y.shape[1]}x{planes.y.shape[0]} but the "
                        f"video starts at {self.shape[1]}x{self.shape[0]}; the size changes "
                        "mid-stream: re-encode at one size",
                        path=path,
                    )
                yield Frame(
                    index=index,
                    time_s=float(t) - t0,
                    data=planes.y,
                    max_code=float(2**planes.bit_depth - 1),
                    source=str(path),
                    kind="video",
                    chroma=planes.chroma,
                    chroma_step=planes.chroma_step,
                    yuv_matrix=planes.matrix,
                    yuv_range=planes.range,
                    bit_depth=planes.bit_depth,
                    transfer_tag=planes.trc,
                )
                index += 1
        finally:
            container.close()


def _check_same(arr: NDArray[Any], first: tuple[tuple[int, ...], np.dtype[Any], str],
                path: str) -> None:
    shape0, dtype0, path0 = first
    name0 = Path(path0).name
    if arr.shape[:2] != shape0[:2]:
        raise ShapeMismatchError(
            f"frame is {arr.shape[1]}x{arr.shape[0]} but the first frame ({name0}) is "
            f"{shape0[1]}x{shape0[0]}; all frames of a recording must share one size: "
            "remove or resize this file",
            path=path,
        )
    if arr.ndim != len(shape0):
        what = {2: "grey", 3: "colour"}
        raise ShapeMismatchError(
            f"frame is {what.get(arr.ndim, str(arr.ndim))} but the first frame ({name0}) is "
            f"{what.get(len(shape0), str(len(shape0)))}; keep one kind of image per "
            "recording",
            path=path,
        )
    if arr.dtype != dtype0:
        raise ShapeMismatchError(
            f"frame is {8 * arr.dtype.itemsize}-bit but the first frame ({name0}) is "
            f"{8 * dtype0.itemsize}-bit; keep one bit depth per recording",
            path=path,
        )


def _float_or_none(value: Any) -> float | None:
    try:
        out = float(value)
    except (TypeError, ValueError, ZeroDivisionError):
        return None
    return out if math.isfinite(out) and out > 0 else None


# ----------------------------------------------------------------------------- video


@dataclass(frozen=True)
class _Planes:
    y: NDArray[Any]
    chroma: tuple[NDArray[Any], NDArray[Any]] | None
    chroma_step: tuple[int, int]
    matrix: str
    range: str
    bit_depth: int
    trc: str | None
    rotation: int
    pix_fmt: str
    converted_from: str | None


def _plane_array(plane: Any, dtype: np.dtype[Any], width: int) -> NDArray[Any]:
    """Zero-copy view of one decoder plane, without the line padding."""
    itemsize = dtype.itemsize
    arr = np.frombuffer(plane, dtype=dtype)
    return arr.reshape(plane.height, plane.line_size // itemsize)[:, :width]


def _video_planes(fr: Any, path: Path) -> _Planes:
    """Raw Y', Cb, Cr planes of a decoded PyAV frame, rotation applied."""
    name = fr.format.name
    converted_from = None
    if not (_PLANAR_YUV.match(name) or _GRAY.match(name) or name in ("nv12", "nv21")):
        # Semi-planar high-depth, RGB-coded or exotic formats: let swscale make planar
        # Y'CbCr keeping the depth. Lossless for p010/p016, a conversion for RGB codecs.
        bits = max(c.bits for c in fr.format.components)
        target = "yuv444p" if bits <= 8 else "yuv444p16le"
        if name.startswith(("p01", "p21", "p41")):
            target = {"p0": "yuv420p", "p2": "yuv422p", "p4": "yuv444p"}[name[:2]] + (
                "16le" if bits > 10 else "10le")
        converted_from = name
        try:
            fr = fr.reformat(format=target)
        except Exception as err:  # av raises several types for unsupported conversions
            raise InputFormatError(
                f"video pixel format {name} cannot be read; re-encode as H.264 yuv420p",
                path=path,
            ) from err
        name = target
    bit_depth = max(c.bits for c in fr.format.components)
    dtype = np.dtype("<u2") if name.endswith("le") else np.dtype(np.uint8)
    w, h = fr.width, fr.height
    y = _plane_array(fr.planes[0], dtype, w)
    chroma: tuple[NDArray[Any], NDArray[Any]] | None = None
    step = (1, 1)
    if name in ("nv12", "nv21"):
        cw = fr.format.chroma_width(w)
        uv = _plane_array(fr.planes[1], dtype, 2 * cw)
        cb, cr = uv[:, 0::2], uv[:, 1::2]
        if name == "nv21":
            cb, cr = cr, cb
        chroma = (cb, cr)
    elif len(fr.planes) >= 3:
        cw = fr.format.chroma_width(w)
        chroma = (_plane_array(fr.planes[1], dtype, cw), _plane_array(fr.planes[2], dtype, cw))
    if chroma is not None:
        ch, cw = chroma[0].shape
        step = (max(1, round(h / ch)), max(1, round(w / cw)))
    full = name.startswith("yuvj") or fr.color_range == _AV_RANGE_FULL
    matrix = _AV_COLORSPACE.get(int(fr.colorspace), "bt601")
    trc = _AV_TRC.get(int(fr.color_trc))
    rotation = int(fr.rotation or 0)
    k = int(round(rotation / 90.0)) % 4
    if k:
        y = np.rot90(y, k)
        if chroma is not None:
            chroma = (np.rot90(chroma[0], k), np.rot90(chroma[1], k))
            if k % 2:
                step = (step[1], step[0])
    y.flags.writeable = False
    if chroma is not None:
        chroma[0].flags.writeable = False
        chroma[1].flags.writeable = False
    return _Planes(
        y=y,
        chroma=chroma,
        chroma_step=step,
        matrix=matrix,
        range="full" if full else "limited",
        bit_depth=bit_depth,
        trc=trc,
        rotation=rotation,
        pix_fmt=fr.format.name if converted_from is None else converted_from,
        converted_from=converted_from,
    )


def _check_not_empty(path: Path) -> None:
    """A 0-byte file is an upload or copy that never finished: say so plainly."""
    try:
        empty = path.stat().st_size == 0
    except OSError:
        return  # the reader reports what is wrong
    if empty:
        raise InputFormatError(
            "file is empty (0 bytes): the copy or upload did not finish; copy it again",
            path=path)


def _open_container(path: Path) -> Any:
    import av

    _check_not_empty(path)
    try:
        # Tags are provenance only: undecodable bytes in them must not reject the video.
        container = av.open(str(path), mode="r", metadata_errors="replace")
    except av.FFmpegError as err:
        raise InputFormatError(
            f"not a readable video ({err.__class__.__name__}: {err.strerror or err}); "
            "check that the file is a complete MP4/MOV/AVI video",
            path=path,
        ) from err
    except OSError as err:
        raise InputFormatError(f"cannot open the video ({err})", path=path) from err
    if not container.streams.video:
        container.close()
        raise InputFormatError(
            "file has no video stream (audio only?); record or export a video", path=path
        )
    if container.streams.video[0].codec_context is None:
        container.close()
        raise InputFormatError(
            "the video codec is not recognised (damaged header or unsupported codec); "
            "re-encode as H.264 MP4",
            path=path,
        )
    return container


def _fraction_text(value: Any) -> str | None:
    if value is None:
        return None
    try:
        num, den = value.numerator, value.denominator
    except AttributeError:
        return str(value)
    if num == 0 and den in (0, 1):
        return None
    return f"{num}/{den}"


def _open_video(path: Path, *, fps: float | None, max_pixels: int) -> Recording:
    import av

    container = _open_container(path)
    try:
        stream = container.streams.video[0]
        cc = stream.codec_context
        width, height = int(cc.width or 0), int(cc.height or 0)
        if width and height:
            _check_pixels(width, height, max_pixels, path)
        try:
            first = next(container.decode(stream), None)
        except av.FFmpegError as err:
            raise InputFormatError(
                f"video cannot be decoded ({err}); the file is damaged, or its codec is "
                "not supported: re-encode as H.264",
                path=path,
            ) from err
        if first is None:
            raise InputFormatError("video contains no decodable frames; record again",
                                   path=path)
        _check_pixels(first.width, first.height, max_pixels, path)
        planes = _video_planes(first, path)
        average_rate = _float_or_none(stream.average_rate)
        guessed_rate = _float_or_none(stream.guessed_rate)
        n_frames = int(stream.frames or 0) or None
        bit_rate = int(stream.bit_rate or 0) or int(container.bit_rate or 0) or None
        duration_s = None
        if stream.duration is not None and stream.time_base is not None:
            duration_s = float(stream.duration * stream.time_base)
        metadata: dict[str, Any] = {
            "container": container.format.name,
            "codec": cc.name,
            "profile": cc.profile,
            "pix_fmt": planes.pix_fmt,
            "converted_from": planes.converted_from,
            "bit_rate": bit_rate,
            "rotation": planes.rotation,
            "time_base": _fraction_text(stream.time_base),
            "average_rate": average_rate,
            "guessed_rate": guessed_rate,
            "fps": average_rate or guessed_rate,
            "n_frames": n_frames,
            "duration_s": duration_s,
            "coded_size": [width, height],
            "yuv_matrix": planes.matrix,
            "yuv_range": planes.range,
            "yuv_matrix_tagged": int(first.colorspace) in _AV_COLORSPACE,
            "color_trc": planes.trc,
            "chroma_step": list(planes.chroma_step),
            "bit_depth": planes.bit_depth,
            "time_source": "pts" if first.time is not None else "fps",
        }
    finally:
        container.close()
    return Recording(
        path=str(path),
        kind="video",
        n_frames=n_frames,
        shape=(int(planes.y.shape[0]), int(planes.y.shape[1])),
        metadata=metadata,
        bit_depth=planes.bit_depth,
        files=(str(path),),
        _fps=fps,
        _max_pixels=max_pixels,
    )


# ----------------------------------------------------------------------------- raw


def _read_dng(path: Path, max_pixels: int) -> tuple[
    NDArray[np.uint16], NDArray[np.uint8], float | NDArray[np.float32], int, Any
]:
    """Visible mosaic, CFA indices, black per photosite, white level, rawpy ``other``."""
    import rawpy

    if not path.is_file():
        raise InputFormatError("file not found; check the path", path=path)
    _check_not_empty(path)
    raw = rawpy.RawPy()
    try:
        try:
            raw.open_file(str(path))
            tags = _read_tiff_ifd_tags(path)
            if tags is None or _TAG_DNG_VERSION not in tags[0]:
                # LibRaw also opens plain TIFFs, reading grey pixels as a Bayer mosaic.
                raise InputFormatError(
                    "named .dng but not a DNG (no DNGVersion tag); export the raw image as "
                    "DNG from the camera app, or rename a TIFF to .tif",
                    path=path,
                )
            sizes = raw.sizes
            _check_pixels(int(sizes.raw_width), int(sizes.raw_height), max_pixels, path)
            raw.unpack()
            mosaic = np.array(raw.raw_image_visible, dtype=np.uint16, copy=True)
            cfa = np.array(raw.raw_colors_visible, dtype=np.uint8, copy=True)
            blacks = np.asarray(raw.black_level_per_channel, dtype=np.float32)
            white = int(raw.white_level)
            other = raw.other
        except rawpy.LibRawError as err:
            raise InputFormatError(
                f"not a readable raw DNG ({err.__class__.__name__}); export the raw "
                "image as DNG from the camera app",
                path=path,
            ) from err
    finally:
        raw.close()
    if mosaic.ndim != 2:
        raise InputFormatError(
            "raw file holds a demosaiced (linear RGB) image, not a Bayer mosaic; export "
            "an unprocessed DNG or a 16-bit TIFF",
            path=path,
        )
    used = np.unique(cfa)
    black_map = blacks[np.clip(cfa, 0, len(blacks) - 1)]
    black: float | NDArray[np.float32]
    if np.all(blacks[used] == blacks[used[0]]):
        black = float(blacks[used[0]])
    else:
        black = black_map
        black.flags.writeable = False
    if white <= float(np.max(blacks)):
        raise InputFormatError(
            f"raw white level {white} is not above the black level; the DNG is malformed",
            path=path,
        )
    mosaic.flags.writeable = False
    cfa.flags.writeable = False
    return mosaic, cfa, black, white, other


def _raw_header(path: Path, max_pixels: int) -> tuple[_StillHeader, int]:
    mosaic, _cfa, _black, white, other = _read_dng(path, max_pixels)
    try:
        exif = read_exif(path)
    except InputFormatError:
        exif = ExifInfo()
    exposure = exif.exposure_s
    iso = exif.iso
    dt = exif.datetime_original
    if exposure is None:
        exposure = _float_or_none(getattr(other, "shutter_speed", None))
    if iso is None:
        iso = _float_or_none(getattr(other, "iso_speed", None))
    if dt is None:
        stamp = getattr(other, "timestamp", None)
        if isinstance(stamp, datetime) and stamp.year > 1970:
            dt = stamp
    exif = ExifInfo(exposure_s=exposure, iso=iso, datetime_original=dt,
                    orientation=exif.orientation, has_subsec=exif.has_subsec,
                    make=exif.make, model=exif.model)
    bit_depth = max(1, int(white).bit_length())
    header = _StillHeader(str(path), int(mosaic.shape[1]), int(mosaic.shape[0]), bit_depth,
                          1, "DNG", exif)
    return header, white


# ----------------------------------------------------------------------------- stills


def _frame_times(headers: Sequence[_StillHeader], fps: float | None, where: Path
                 ) -> tuple[tuple[float, ...], str, str | None]:
    """Times of stills and a word for where they came from (plus a note)."""
    n = len(headers)
    stamps = [h.exif.datetime_original for h in headers]
    note = None
    if n and all(s is not None for s in stamps):
        t0 = stamps[0]
        assert t0 is not None
        times = tuple((s - t0).total_seconds() for s in stamps if s is not None)
        increasing = all(b > a for a, b in zip(times, times[1:]))
        subsec = all(h.exif.has_subsec for h in headers)
        if increasing and (subsec or fps is None):
            return times, "exif", None if subsec else "EXIF times have whole-second resolution"
        note = ("EXIF capture times are not strictly increasing in name order"
                if not increasing else "EXIF times have whole-second resolution; fps used")
    if fps is not None:
        if not (math.isfinite(fps) and fps > 0):
            raise InputFormatError(f"fps must be a positive number, got {fps!r}")
        return tuple(i / fps for i in range(n)), "fps", note
    if n > 1:
        reason = note or "no EXIF capture times"
        warnings.warn(
            f"{where}: {reason}; frame times are the frame index in seconds (pass fps "
            "to set the frame rate)",
            TimingWarning,
            stacklevel=3,
        )
    return tuple(float(i) for i in range(n)), "index", note


def _list_folder(folder: Path) -> list[Path]:
    try:
        entries = [p for p in folder.iterdir() if not p.name.startswith(".") and p.is_file()]
    except OSError as err:
        raise InputFormatError(f"cannot list the folder ({err.strerror})", path=folder) from err
    images = [p for p in entries if p.suffix.lower() in STILL_SUFFIXES + RAW_SUFFIXES]
    if not images:
        videos = [p for p in entries if p.suffix.lower() in VIDEO_SUFFIXES]
        if videos:
            raise InputFormatError(
                f"folder holds {len(videos)} video file(s) but no images; pass the video "
                f"file itself (e.g. {videos[0].name})",
                path=folder,
            )
        raise InputFormatError(
            "folder holds no JPEG, PNG, TIFF or DNG images; point to the folder with the "
            "frames",
            path=folder,
        )
    return images


def _open_images(paths: Sequence[Path], *, where: Path, fps: float | None,
                 max_pixels: int) -> Recording:
    raws = [p for p in paths if p.suffix.lower() in RAW_SUFFIXES]
    if raws and len(raws) != len(paths):
        other = next(p for p in paths if p.suffix.lower() not in RAW_SUFFIXES)
        raise InputFormatError(
            f"recording mixes raw DNG ({raws[0].name}) and processed images ({other.name}); "
            "put them in separate folders",
            path=where,
        )
    kind: RecordingKind = "raw" if raws else "stills"
    headers: list[_StillHeader] = []
    white_levels: set[int] = set()
    for p in paths:
        if kind == "raw":
            h, white = _raw_header(p, max_pixels)
            white_levels.add(white)
        else:
            h = _read_still_header(p, max_pixels)
        if headers:
            h0 = headers[0]
            if (h.width, h.height) != (h0.width, h0.height):
                raise ShapeMismatchError(
                    f"frame is {h.width}x{h.height} but the first frame "
                    f"({Path(h0.path).name}) is {h0.width}x{h0.height}; all frames of a "
                    "recording must share one size: remove or resize this file",
                    path=p,
                )
            if h.bit_depth != h0.bit_depth:
                raise ShapeMismatchError(
                    f"frame is {h.bit_depth}-bit but the first frame ({Path(h0.path).name}) "
                    f"is {h0.bit_depth}-bit; keep one bit depth per recording",
                    path=p,
                )
        headers.append(h)
    times, source, note = _frame_times(headers, fps, where)
    exposures = sorted({h.exif.exposure_s for h in headers if h.exif.exposure_s is not None})
    isos = sorted({h.exif.iso for h in headers if h.exif.iso is not None})
    h0 = headers[0]
    metadata: dict[str, Any] = {
        "format": h0.fmt,
        "n_files": len(headers),
        "bit_depth": h0.bit_depth,
        "time_source": source,
        "time_note": note,
        "fps": fps if source == "fps" else _fps_estimate(times),
        "exposures_s": exposures,
        "isos": isos,
        "orientation": h0.exif.orientation,
        "make": h0.exif.make,
        "model": h0.exif.model,
    }
    if kind == "raw":
        metadata["white_level"] = sorted(white_levels)
    return Recording(
        path=str(where),
        kind=kind,
        n_frames=len(headers),
        shape=(h0.height, h0.width),
        metadata=metadata,
        bit_depth=h0.bit_depth,
        files=tuple(h.path for h in headers),
        _headers=tuple(headers),
        _times_s=times,
        _fps=fps,
        _max_pixels=max_pixels,
    )


def _fps_estimate(times: Sequence[float]) -> float | None:
    if len(times) < 2:
        return None
    dt = np.diff(np.asarray(times, dtype=np.float64))
    med = float(np.median(dt))
    return 1.0 / med if med > 0 else None


# ----------------------------------------------------------------------------- public


def open_recording(
    source: str | Path | Iterable[str | Path],
    *,
    fps: float | None = None,
    max_pixels: int = DEFAULT_MAX_PIXELS,
    sort: bool = True,
) -> Recording:
    """Open a folder of stills, a list of image files, a video or a DNG for streaming.

    Only headers, EXIF and (for video) the first frame are read here; frames are decoded
    when ``Recording.frames()`` is iterated.

    Parameters
    ----------
    source : str, Path, or iterable of str/Path
        A folder (its JPEG/PNG/TIFF or DNG files, hidden files ignored), a single image
        or DNG, a video (MP4/MOV/AVI/MKV; H.264, HEVC, MJPEG, ...), or a list of images.
    fps : float, optional
        Frame rate for stills without EXIF capture times. Videos use their timestamps
        and use ``fps`` only when the stream carries none.
    max_pixels : int
        Refuse images/videos larger than this many pixels (checked on the header,
        before decoding).
    sort : bool
        Sort a list of files naturally by name (folders are always sorted).

    Returns
    -------
    Recording

    Raises
    ------
    InputFormatError
        Missing path, empty folder, unreadable or unsupported file, too many pixels.
    ShapeMismatchError
        Stills of different sizes or bit depths (names the offending file).
    """
    if isinstance(source, (str, Path)):
        path = Path(source)
        if not path.exists():
            raise InputFormatError("no such file or folder; check the path", path=path)
        if path.is_dir():
            files = sorted(_list_folder(path), key=natural_key)
            return _open_images(files, where=path, fps=fps, max_pixels=max_pixels)
        suffix = path.suffix.lower()
        if suffix in STILL_SUFFIXES + RAW_SUFFIXES:
            return _open_images([path], where=path, fps=fps, max_pixels=max_pixels)
        if suffix in VIDEO_SUFFIXES:
            return _open_video(path, fps=fps, max_pixels=max_pixels)
        raise InputFormatError(
            f"unsupported file type {path.suffix or '(none)'}; give a folder of images, "
            f"an image ({', '.join(STILL_SUFFIXES + RAW_SUFFIXES)}) or a video "
            f"({', '.join(VIDEO_SUFFIXES)})",
            path=path,
        )
    paths = [Path(p) for p in source]
    if not paths:
        raise InputFormatError("the list of image files is empty; give at least one file")
    for p in paths:
        if not p.is_file():
            raise InputFormatError("file not found; check the path", path=p)
        if p.suffix.lower() not in STILL_SUFFIXES + RAW_SUFFIXES:
            raise InputFormatError(
                f"a list of files must hold images ({', '.join(STILL_SUFFIXES + RAW_SUFFIXES)}"
                f"); open a video on its own",
                path=p,
            )
    if sort:
        paths = sorted(paths, key=natural_key)
    return _open_images(paths, where=paths[0].parent, fps=fps, max_pixels=max_pixels)


def iter_frames(source: str | Path | Iterable[str | Path], **kwargs: Any) -> Iterator[Frame]:
    """Shorthand for ``open_recording(source, **kwargs).frames()``."""
    return open_recording(source, **kwargs).frames()
