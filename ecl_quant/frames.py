"""Frame sources: image folders, file lists, videos and raw DNG stills.

Every source is a generator of :class:`Frame` objects that opens and closes what it
needs as it goes, so memory does not grow with the length of a recording.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import NDArray

__all__ = ["Frame"]

FrameKind = Literal["still", "video", "raw"]


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
        Raw only: black level per photosite, in codes.
    cfa : (H, W) ndarray of uint8 or None
        Raw only: colour index per photosite (0 = R, 1 = G, 2 = B, 3 = G2).
    bit_depth : int
        Bits per code value.
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

    @property
    def shape(self) -> tuple[int, int]:
        """(H, W) of the frame in pixels."""
        return (int(self.data.shape[0]), int(self.data.shape[1]))
