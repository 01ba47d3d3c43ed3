"""``measure``: one recording -> per-spot curves and figures of merit, with provenance.

The frame loop: at most two passes over the frames, one when the spots are given.

1. Detection pass (only without spots): per frame, the drift shift (downscaled luma,
   :class:`~ecl_quant.spots.DriftTracker`) and the linear frame minus the master dark
   (or, without one, minus the first frame: the pre-emission frames stand in for the
   dark) go into registered running max and sum projections; spots are then detected
   on the max (or sum) projection.
2. Integration pass: per frame only the spots' union crop (padded for drift) is
   converted to float32 and linearised; :class:`~ecl_quant.curves.SpotIntegrator` turns
   it into per-spot sums, backgrounds and saturated pixel counts.

Afterwards the noise model is estimated from the recording (unless given), the
per-frame net signal and its standard error are formed, and
:func:`~ecl_quant.curves.curve_metrics` reduces each spot's curve. Nothing holds more
than one frame at a time.

Validity of integrals
---------------------
A spot with any saturated aperture pixel in any frame gets the ``saturated`` flag and
**NaN** ``integral``, ``integral_se``, ``peak``, ``peak_se`` and ``snr`` (the clipped
values are kept in ``integral_raw`` and ``peak_raw`` for inspection only).
"""

from __future__ import annotations

import functools
import json
import math
import platform
import sys
import time
from collections import deque
from collections.abc import Iterable, Iterator
from dataclasses import asdict, dataclass, field, replace
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Literal

import cv2
import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ._io import atomic_write, ensure_dir, figure_png, sha256_file, to_jsonable
from .curves import (
    CurveMetrics,
    CurveSettings,
    NoiseModel,
    SpotIntegrator,
    curve_metrics,
    estimate_noise_model,
)
from .errors import InputFormatError, OutputError, ShapeMismatchError, SpotError
from .spots import (
    DriftTracker,
    ProjectionAccumulator,
    SpotSet,
    detect_spots,
    drift_plane,
    isolated_pixels,
    load_spots,
    make_spot,
    spots_to_dict,
)

__all__ = [
    "SPOTS_COLUMNS",
    "CURVES_COLUMNS",
    "OUTPUT_FILES",
    "MeasureSettings",
    "MeasureResult",
    "measure",
    "write_measure_outputs",
    "check_output_dir",
    "summary_table",
    "render_overlay",
    "render_curves",
]

#: Columns of spots.csv, in order (the contract ones first).
SPOTS_COLUMNS = (
    "spot", "x_px", "y_px", "radius_px", "area_px", "background", "peak", "time_to_peak_s",
    "onset_s", "fwhm_s", "time_above_s", "integral", "integral_se", "snr", "saturated_frames",
    "flags", "label", "shape", "peak_se", "time_to_peak_se_s", "baseline", "baseline_sd",
    "baseline_frames", "peak_raw", "integral_raw", "peak_snr", "noise_ratio",
    "background_px", "annulus_inner_px", "annulus_outer_px")
#: Columns of curves.csv.
CURVES_COLUMNS = ("spot", "frame", "time_s", "signal", "signal_se", "background",
                  "saturated_px", "shift_x_px", "shift_y_px", "drifted")
OUTPUT_FILES = ("spots.csv", "curves.csv", "spots.json", "run.json", "overlay.png", "curves.png")
#: Hidden file present while write_measure_outputs runs (marks an unfinished folder).
_WRITING_MARKER = ".ecl-quant-writing"
#: With spots given, the overlay projection is the max over every k-th frame, k up to
#: this (1 below 200 frames, 2 below 300, ...; see run.json analysis.projection_every).
PROJECTION_EVERY = 4
#: A recording whose decoded frames fit in this many MB is decoded once when its spots
#: are detected on every frame: the detection pass keeps its frames for the integration
#: pass (e.g. 60 frames of 640 x 480 video: 28 MB). A longer one is decoded again.
FRAME_CACHE_MB = 96.0


@dataclass(frozen=True)
class MeasureSettings:
    """Every option of :func:`measure` (recorded in run.json).

    Attributes
    ----------
    channel : {"red", "green", "blue", "luma", "raw"}
    transfer : str
        ``auto``, ``srgb``, ``bt709``, ``linear``, ``gamma=G`` or ``profile=FILE``.
    fps : float or None
        Frame rate for stills without capture times.
    detect : {"threshold", "log"}
        Detection method (:func:`~ecl_quant.spots.detect_spots`).
    detect_projection : {"max", "sum"}
    detect_scale : int or None
        Downscale factor of the detection projection (box average of the codes): None
        is 2 for frames of 720 rows or more (spots there are large; the pass costs a
        quarter), else 1. Raw mosaics are never downscaled.
    detect_frames : {"auto", "all", "key"}
        Frames of the detection pass. ``key``: a video's key frames only (they decode
        without the others, at a small fraction of the cost); ``all``: every frame;
        ``auto`` (default): key frames when a video has at least 8, none more than
        ``detect_key_gap_s`` apart (the emission lasts seconds, so it is sampled near
        its peak), and they show at least one spot; else every frame.
    detect_key_gap_s : float
        Largest gap between key frames for ``auto`` to use them, s.
    detect_k_sigma, min_area_px, min_circularity : float
    aperture_scale : float
        Detected aperture radius = scale x half-maximum radius.
    aperture_radius_px : float or None
    uniform_radius : bool
    annulus_inner, annulus_outer : float
        Background annulus radii in multiples of each spot's radius (extent).
    annulus_px : (float, float) or None
        Absolute annulus radii in pixels instead.
    annulus_min_px : int
    background_clip_sigma : float
    background_estimator : {"mean", "median"}
        Level of the sigma-clipped annulus pixels: their mean (default; the median of
        8-bit codes moves in whole code steps) or their median.
    drift : bool
        Register frames (hand-held recordings).
    drift_target_px : int
        Longest side of the downscaled frame used for drift (480: 1080p in 4 x 4 blocks).
        Measured on a simulated 1080p H.264 recording with no drift at all: 8 x 8 blocks
        (256) reported shifts up to 5.3 px (rms 1.6) while the spots faded, 4 x 4 blocks
        up to 1.3 px (rms 0.6), for ~11 % more time per frame.
    max_shift_px : float
        Shifts beyond this (from the reference) flag ``drifted``; the crop margin.
    read_var : float or None
        Per-pixel read variance, FS^2 (per frame); with ``gain``, replaces the estimate.
    gain : float or None
        Electrons per full scale.
    noise_source : str
        Where ``read_var`` and ``gain`` came from (recorded in run.json), e.g. the
        camera.json they were read from by :func:`ecl_quant.radiometry.camera_noise_model`.
    saturation_level : float
        Fraction of the encoded maximum counted as saturated.
    per_exposure : bool
        Divide by the exposure time when known (signal per second).
    exposure_s : float or None
        Exposure time for frames that do not carry one (video).
    baseline_s : float or None
        Length of the pre-emission baseline from the first frame; None: automatic.
    onset_k_sigma : float
    onset_min_frames : int
    smooth_frames : int or None
    min_snr : float
    scale_se_to_baseline : bool
        Multiply every standard error by the observed/model baseline noise ratio (median
        over spots) when it exceeds 1: compression and spatially correlated noise make
        the per-pixel model too small for sums.
    max_pixels : int
    """

    channel: str = "red"
    transfer: str = "auto"
    fps: float | None = None
    detect: Literal["threshold", "log"] = "threshold"
    detect_projection: Literal["max", "sum"] = "max"
    detect_scale: int | None = None
    detect_frames: Literal["auto", "all", "key"] = "auto"
    detect_key_gap_s: float = 2.0
    detect_k_sigma: float = 6.0
    min_area_px: float = 9.0
    min_circularity: float = 0.6
    aperture_scale: float = 1.5
    aperture_radius_px: float | None = None
    uniform_radius: bool = True
    annulus_inner: float = 1.2
    annulus_outer: float = 2.0
    annulus_px: tuple[float, float] | None = None
    annulus_min_px: int = 20
    background_clip_sigma: float = 3.0
    background_estimator: Literal["mean", "median"] = "mean"
    drift: bool = True
    drift_target_px: int = 480
    max_shift_px: float = 20.0
    read_var: float | None = None
    gain: float | None = None
    noise_source: str = "given"
    saturation_level: float = 0.98
    per_exposure: bool = True
    exposure_s: float | None = None
    baseline_s: float | None = None
    onset_k_sigma: float = 4.0
    onset_min_frames: int = 3
    smooth_frames: int | None = None
    min_snr: float = 3.0
    scale_se_to_baseline: bool = True
    max_pixels: int = 100_000_000

    def __post_init__(self) -> None:
        from .radiometry import CHANNELS
        from .transfer import parse_transfer

        if self.channel not in CHANNELS:
            raise InputFormatError(f"unknown channel {self.channel!r}; use one of "
                                   f"{', '.join(CHANNELS)}")
        parse_transfer(self.transfer)
        if self.detect not in ("threshold", "log"):
            raise InputFormatError(f"unknown detection method {self.detect!r}; use threshold or log")
        if self.detect_frames not in ("auto", "all", "key"):
            raise InputFormatError("detect_frames must be 'auto', 'all' or 'key'")
        if not self.detect_key_gap_s > 0:
            raise InputFormatError("detect_key_gap_s must be > 0")
        if self.detect_projection not in ("max", "sum"):
            raise InputFormatError("detect_projection must be 'max' or 'sum'")
        if self.detect_scale is not None and not (int(self.detect_scale) == self.detect_scale
                                                  and 1 <= self.detect_scale <= 8):
            raise InputFormatError("detect_scale must be a whole number from 1 to 8")
        if (self.read_var is None) != (self.gain is None):
            raise InputFormatError("give both read_var and gain for a noise model, or neither")
        if self.gain is not None and not self.gain > 0:
            raise InputFormatError(f"gain must be > 0 electrons per full scale, got {self.gain!r}")
        if self.read_var is not None and not self.read_var >= 0:
            raise InputFormatError(f"read_var must be >= 0, got {self.read_var!r}")
        if self.annulus_px is not None:
            a, b = self.annulus_px
            if not 0 <= a < b:
                raise InputFormatError(f"annulus_px must be (inner, outer) with 0 <= inner < outer")
            object.__setattr__(self, "annulus_px", (float(a), float(b)))
        elif not 0 < self.annulus_inner < self.annulus_outer:
            raise InputFormatError("annulus radii must satisfy 0 < inner < outer")
        for name in ("max_shift_px", "aperture_scale", "detect_k_sigma"):
            if not getattr(self, name) > 0:
                raise InputFormatError(f"{name} must be > 0")
        if not 0 < self.saturation_level <= 1:
            raise InputFormatError("saturation_level must be in (0, 1]")
        for name in ("exposure_s", "fps", "baseline_s", "aperture_radius_px"):
            v = getattr(self, name)
            if v is not None and not v > 0:
                raise InputFormatError(f"{name} must be > 0, got {v!r}")

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly form."""
        d = asdict(self)
        if d["annulus_px"] is not None:
            d["annulus_px"] = list(d["annulus_px"])
        return d


@dataclass(frozen=True, eq=False)
class MeasureResult:
    """Outcome of :func:`measure`.

    Attributes
    ----------
    spots_table : DataFrame
        One row per spot (:data:`SPOTS_COLUMNS`).
    curves_table : DataFrame
        Long table, one row per spot and frame (:data:`CURVES_COLUMNS`); ``drifted`` marks
        frames whose shift exceeds ``max_shift_px`` or was limited to the crop margin.
    spot_set : SpotSet
        The spots used (detected or given); reusable with ``spots=``.
    projection_max : (H, W) ndarray of float32
        Max projection (linear, dark corrected; NaN where not computed: with given spots
        only the spots' crop is projected).
    projection_sum : (H, W) ndarray of float32 or None
    metrics : tuple of CurveMetrics
    noise : NoiseModel or None
    provenance : dict
        Inputs (with SHA-256), settings, versions, timings, resolved transfer, noise
        model, drift summary; the body of run.json.
    """

    spots_table: pd.DataFrame
    curves_table: pd.DataFrame
    spot_set: SpotSet
    projection_max: NDArray[np.float32]
    projection_sum: NDArray[np.float32] | None
    metrics: tuple[CurveMetrics, ...]
    noise: NoiseModel | None
    provenance: dict[str, Any] = field(default_factory=dict)

    def to_frame(self) -> pd.DataFrame:
        """The spots table."""
        return self.spots_table

    @property
    def valid(self) -> pd.Series:
        """Per spot: True when the integral is valid (finite, not saturated)."""
        return self.spots_table["integral"].notna()


# ------------------------------------------------------------------ helpers


def _versions() -> dict[str, str]:
    """Versions of Python, ecl_quant and the libraries that shape the numbers (read
    once per process: a batch worker measures many recordings)."""
    return dict(_versions_once())


@functools.lru_cache(maxsize=1)
def _versions_once() -> dict[str, str]:
    from importlib import metadata

    from . import __version__

    out = {"ecl_quant": __version__, "python": platform.python_version()}
    for dist in ("numpy", "scipy", "pandas", "opencv-python-headless", "opencv-python",
                 "scikit-image", "av", "Pillow", "rawpy", "matplotlib"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            continue
    return out


def _file_entries(paths: Iterable[str | Path]) -> list[dict[str, Any]]:
    out = []
    for p in paths:
        p = Path(p)
        if p.is_file():
            out.append({"path": str(p), "bytes": p.stat().st_size, "sha256": sha256_file(p)})
    return out


def _dark_files(path: Path) -> list[Path]:
    if path.is_dir():
        return sorted(q for q in path.iterdir() if q.is_file() and not q.name.startswith("."))
    return [path]


def _progress(total: int | None, desc: str, enabled: bool) -> Any:
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit="frame", file=sys.stderr, leave=False,
                disable=(not enabled) or None, mininterval=0.5)


def _open(source: Any, settings: MeasureSettings) -> Any:
    from .frames import open_recording

    if hasattr(source, "frames") and hasattr(source, "shape") and hasattr(source, "kind"):
        return source
    return open_recording(source, fps=settings.fps, max_pixels=settings.max_pixels)


def _hot_pixel_fill(first: NDArray[np.float32], known: NDArray[np.bool_] | None
                    ) -> tuple[NDArray[np.intp], NDArray[np.intp], NDArray[np.float32]]:
    """Hot pixels of a crop and, for each, its non-hot 4-neighbours with equal weights.

    Hot pixels are fixed to the sensor while the apertures follow the drifting card: one
    that an aperture edge crosses adds a step to the spot's curve, a bias no standard
    error covers. They are found on the first frame (:func:`isolated_pixels`, plus the
    master dark's hot-pixel map) and replaced in every frame by the mean of their
    neighbours.

    Returns
    -------
    hot : (k,) flat indices; neighbours : (k, 4) flat indices; weights : (k, 4)
    """
    hot = isolated_pixels(first)
    if known is not None:
        hot = hot | known
    h, w = hot.shape
    rr, cc = np.nonzero(hot)
    nb = np.zeros((rr.size, 4), np.intp)
    wt = np.zeros((rr.size, 4), np.float32)
    for i, (r, c) in enumerate(zip(rr, cc)):
        cand = [(r + a) * w + (c + b) for a, b in ((-1, 0), (1, 0), (0, -1), (0, 1))
                if 0 <= r + a < h and 0 <= c + b < w and not hot[r + a, c + b]]
        cand = cand or [int(r * w + c)]
        nb[i, :len(cand)] = cand
        wt[i, :len(cand)] = 1.0 / len(cand)
    return (rr * w + cc).astype(np.intp), nb, wt


def _key_frames(rec: Any) -> Iterator[Any]:
    """The recording's key frames (all frames where the source cannot pick them)."""
    try:
        return iter(rec.frames(key_only=True))
    except TypeError:  # a recording-like object without key_only
        return iter(rec.frames())


class _FrameCache:
    """The frames of one pass over a recording, kept for the next pass while their
    pixels fit in ``limit_mb``; beyond that nothing is kept and the next pass decodes
    again.

    Kept frames are made read-only, so a step that wrote into a frame's pixels (which
    the next pass would then read changed) fails at once instead; the frames already
    handed on when the limit is passed stay so.
    """

    def __init__(self, limit_mb: float) -> None:
        self._left = int(limit_mb * 2**20)
        self._frames: deque[Any] | None = deque()

    @staticmethod
    def _arrays(frame: Any) -> list[NDArray[Any]]:
        arrays = [frame.data]
        if getattr(frame, "chroma", None) is not None:
            arrays.extend(frame.chroma)
        for extra in (getattr(frame, "black_level", None), getattr(frame, "cfa", None)):
            if isinstance(extra, np.ndarray):
                arrays.append(extra)
        return arrays

    def keep(self, frames: Iterable[Any]) -> Iterator[Any]:
        """``frames``, each kept (read-only) while the limit allows."""
        for frame in frames:
            if self._frames is not None:
                arrays = self._arrays(frame)
                self._left -= sum(a.nbytes for a in arrays)
                if self._left < 0:
                    self._frames = None  # too long: the next pass decodes again
                else:
                    for a in arrays:
                        a.flags.writeable = False
                    self._frames.append(frame)
            yield frame

    @property
    def complete(self) -> bool:
        """Whether every frame of the pass was kept."""
        return self._frames is not None

    def replay(self) -> Iterator[Any]:
        """The kept frames in order, each let go once handed over."""
        frames = self._frames
        self._frames = None
        while frames:
            yield frames.popleft()


def _detect_factor(rec: Any, settings: MeasureSettings) -> int:
    """Downscale factor of the detection pass: 2 for frames of 720 rows or more."""
    if settings.detect_scale is not None:
        return int(settings.detect_scale)
    if rec.kind == "raw":
        return 1  # the mosaic's colours would mix
    return 2 if min(rec.shape) >= 720 else 1


def _downscale(img: NDArray[Any], factor: int) -> NDArray[Any]:
    """Box average by an integer factor (cv2.resize INTER_AREA), same dtype."""
    if factor <= 1:
        return img
    h, w = img.shape[:2]
    src = np.ascontiguousarray(img)
    return cv2.resize(src, (w // factor, h // factor), interpolation=cv2.INTER_AREA)


def _downscale_frame(frame: Any, factor: int) -> Any:
    """The frame box-averaged by ``factor`` (codes; for the detection projection only).

    Video: Y' is averaged to the chroma grid for 4:2:0 (factor 2), chroma kept.
    """
    if factor <= 1:
        return frame
    data = _downscale(frame.data, factor)
    if frame.kind == "video" and frame.chroma is not None:
        step = frame.chroma_step
        cb, cr = frame.chroma
        if step == (factor, factor):
            chroma = (cb[:data.shape[0], :data.shape[1]], cr[:data.shape[0], :data.shape[1]])
            new_step = (1, 1)
        else:
            chroma = (_downscale(cb, factor), _downscale(cr, factor))
            new_step = step
        return replace(frame, data=data, chroma=chroma, chroma_step=new_step)
    return replace(frame, data=data)


def _upscale(img: NDArray[np.float32], shape: tuple[int, int]) -> NDArray[np.float32]:
    """Bilinear back to full size (the projection kept in the result and drawn)."""
    src = np.where(np.isfinite(img), img, 0.0).astype(np.float32)
    return cv2.resize(src, (shape[1], shape[0]), interpolation=cv2.INTER_LINEAR)


def _empty_tables() -> tuple[pd.DataFrame, pd.DataFrame]:
    return pd.DataFrame(columns=list(SPOTS_COLUMNS)), pd.DataFrame(columns=list(CURVES_COLUMNS))


# ------------------------------------------------------------------ measure


def measure(source: Any, *, spots: str | Path | SpotSet | None = None,
            dark: Any = None, settings: MeasureSettings = MeasureSettings(),
            progress: bool = False) -> MeasureResult:
    """Measure every spot of one recording.

    Parameters
    ----------
    source : str, Path, list of paths, or Recording
        A video, a folder of stills, a list of images, a DNG, or an opened
        :class:`~ecl_quant.frames.Recording`.
    spots : str, Path or SpotSet, optional
        A spot file (:func:`~ecl_quant.spots.load_spots`) or spots; None detects them.
    dark : str, Path or MasterDark, optional
        Dark frames (folder, image or video) or a master dark; same size, channel and
        transfer as the recording.
    settings : MeasureSettings
    progress : bool
        Progress bar on stderr (tqdm; only on a terminal).

    Returns
    -------
    MeasureResult
        With empty tables (and a :class:`~ecl_quant.errors.NoSpotsWarning`) when no spot
        was detected.

    Raises
    ------
    InputFormatError, ShapeMismatchError, SpotError
        Unreadable input, a dark of another size, a malformed spot file or spots outside
        the frame.
    """
    import cv2

    # One OpenCV thread: decoding keeps both cores busy, and OpenCV's idle workers spin
    # after each call (measured: ~0.5 ms of CPU per 1080p frame). Restored afterwards.
    threads = cv2.getNumThreads()
    cv2.setNumThreads(1)
    try:
        return _measure(source, spots=spots, dark=dark, settings=settings, progress=progress)
    finally:
        cv2.setNumThreads(threads)


def _measure(source: Any, *, spots: str | Path | SpotSet | None, dark: Any,
             settings: MeasureSettings, progress: bool) -> MeasureResult:
    """:func:`measure` itself."""
    from .radiometry import (
        MasterDark,
        code_values,
        hot_pixel_map,
        linear_values,
        load_dark,
        saturation_floor,
        saturation_mask,
        transfer_choice,
    )
    from .transfer import parse_transfer

    t_start = time.perf_counter()
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    rec = _open(source, settings)
    shape = (int(rec.shape[0]), int(rec.shape[1]))
    choice = transfer_choice(settings.transfer, rec)
    spec = parse_transfer(choice["resolved"])
    channel = settings.channel

    spot_path: Path | None = None
    spot_set: SpotSet | None
    if spots is None:
        spot_set = None
    elif isinstance(spots, SpotSet):
        spot_set = spots
    else:
        spot_path = Path(spots)
        spot_set = load_spots(spot_path)
    if spot_set is not None:
        if spot_set.frame_shape is not None and tuple(spot_set.frame_shape) != shape:
            raise SpotError(
                f"the spots were defined on {spot_set.frame_shape[1]}x{spot_set.frame_shape[0]} "
                f"frames but the recording is {shape[1]}x{shape[0]}; use spots made on this "
                "recording's size", path=spot_path)
        if len(spot_set) == 0:
            raise SpotError("the spot file holds no spots", path=spot_path)
        spot_set.check_fits(shape, path=spot_path)

    dark_path: Path | None = None
    master: MasterDark | None
    if dark is None:
        master = None
    elif isinstance(dark, MasterDark):
        master = dark
    else:
        dark_path = Path(dark)
        master = load_dark(dark_path, channel=channel, transfer=spec, shape=shape)
    if master is not None and master.shape != shape:
        raise ShapeMismatchError(
            f"dark frame is {master.shape[1]}x{master.shape[0]} but the recording is "
            f"{shape[1]}x{shape[0]}; record darks at the same resolution", path=dark_path)

    def linear(frame: Any, region: tuple[slice, slice] | None) -> NDArray[np.float32]:
        lin = linear_values(frame, channel, spec, region=region)
        if master is not None:
            lin -= master.level if region is None else master.level[region]
        return lin

    def new_tracker() -> DriftTracker | None:
        return DriftTracker(shape, target_px=settings.drift_target_px) if settings.drift else None

    timings: dict[str, float] = {}
    shifts: list[tuple[float, float, float, bool]] = []
    projection_sum: NDArray[np.float32] | None = None
    detection_info: dict[str, Any] = {}
    # The integration pass decodes the recording again unless the detection pass kept
    # every frame (a short recording, see FRAME_CACHE_MB).
    pass2_frames: Iterator[Any] | None = None

    # ---------------------------------------------------------- pass 1: detection
    if spot_set is None:
        t1 = time.perf_counter()
        f_det = _detect_factor(rec, settings)
        small_shape = (shape[0] // f_det, shape[1] // f_det)
        dark_small = None if master is None else _downscale(master.level, f_det)

        def detection_pass(frames: Iterable[Any], tracker: DriftTracker | None, label: str
                           ) -> tuple[ProjectionAccumulator, NDArray[np.intp],
                                      list[tuple[float, float, float, bool]], list[float]]:
            """Registered projections of these frames, the hot pixels masked, the shifts
            and the frame times."""
            acc = ProjectionAccumulator(small_shape)
            base: NDArray[np.float32] | None = None
            hot_flat: NDArray[np.intp] = np.zeros(0, np.intp)
            found_shifts: list[tuple[float, float, float, bool]] = []
            times: list[float] = []
            with _progress(rec.n_frames if label == "detect" else None, label,
                           progress) as bar:
                for frame in frames:
                    if tracker is not None:
                        found_shifts.append(tracker.update(drift_plane(frame, channel)))
                    else:
                        found_shifts.append((0.0, 0.0, 0.0, False))
                    times.append(float(frame.time_s))
                    small = _downscale_frame(frame, f_det)
                    lin = linear_values(small, channel, spec)
                    if base is None:
                        # Hot pixels: sensor-fixed and noisy (their shot noise survives any
                        # dark subtraction); zeroed before registration so that the moving
                        # max projection does not smear them into spot-like blobs.
                        if dark_small is not None:
                            lin -= dark_small
                        hot = isolated_pixels(lin)
                        if master is not None:
                            hot |= _downscale(hot_pixel_map(master).astype(np.float32),
                                              f_det) > 0
                        hot_flat = np.flatnonzero(hot)
                        base = lin.copy() if master is None else dark_small
                        lin = lin - base if master is None else lin
                    else:
                        lin -= base
                    lin.reshape(-1)[hot_flat] = 0.0
                    dx, dy = found_shifts[-1][0], found_shifts[-1][1]
                    acc.add(lin, (int(round(dx / f_det)), int(round(dy / f_det))))
                    bar.update(1)
            return acc, hot_flat, found_shifts, times

        def find(acc: ProjectionAccumulator) -> SpotSet:
            proj = acc.max if settings.detect_projection == "max" else acc.sum
            return detect_spots(
                proj, method=settings.detect, min_area_px=settings.min_area_px / f_det**2,
                min_circularity=settings.min_circularity, k_sigma=settings.detect_k_sigma,
                min_sigma_px=1.5 / f_det, aperture_scale=settings.aperture_scale,
                aperture_radius_px=(None if settings.aperture_radius_px is None
                                    else settings.aperture_radius_px / f_det),
                uniform_radius=settings.uniform_radius)

        # Key frames first (videos): a sparse sample that costs a fraction of a pass.
        key_note = "not a video" if rec.kind != "video" else "not asked for"
        found = None
        pass1_tracker: DriftTracker | None = None
        if rec.kind == "video" and settings.detect_frames != "all":
            tracker_k = new_tracker()
            acc, hot_flat, _key_shifts, key_times = detection_pass(
                _key_frames(rec), tracker_k, "detect (key frames)")
            # Gaps between key frames, and from the last one to the end of the video.
            end_s = float(rec.metadata.get("duration_s") or 0.0)
            edges = np.asarray(key_times + ([max(end_s, key_times[-1])] if key_times else []))
            max_gap = float(np.diff(edges).max()) if edges.size > 1 else math.inf
            usable = settings.detect_frames == "key" or (
                len(key_times) >= 8 and max_gap <= settings.detect_key_gap_s)
            if usable and acc.n_frames:
                found = find(acc)
                if len(found) == 0 and settings.detect_frames == "auto":
                    found, key_note = None, "key frames showed no spot"
                else:
                    key_note = "used"
                    pass1_tracker = tracker_k
            else:
                key_note = (f"key frames: {len(key_times)}, largest gap {max_gap:.3g} s "
                            f"(need >= 8, <= {settings.detect_key_gap_s:g} s)")
            timings["detect_key_frames_s"] = time.perf_counter() - t1
        if found is None:
            kept = _FrameCache(FRAME_CACHE_MB)
            acc, hot_flat, shifts, _times = detection_pass(kept.keep(rec.frames()),
                                                           new_tracker(), "detect")
            if kept.complete:
                pass2_frames = kept.replay()
            if acc.n_frames == 0:
                raise InputFormatError("the recording holds no frames", path=rec.path)
            found = find(acc)
        detect_frames_used = "key" if pass1_tracker is not None else "all"
        projection_max = acc.max
        projection_sum = acc.sum
        if f_det > 1:
            # Small pixel k covers full-resolution pixels f k .. f k + f - 1.
            off = (f_det - 1) / 2.0
            spots_full = []
            for sp in found.spots:
                x, y, r = sp.params
                spots_full.append(make_spot(sp.number, "circle",
                                            (round(f_det * x + off, 3), round(f_det * y + off, 3),
                                             round(f_det * r, 3))))
            found = SpotSet(tuple(spots_full), shape, (), found.provenance)
            projection_max = _upscale(projection_max, shape)
            projection_sum = _upscale(projection_sum, shape)
        detection_info = {"projection": settings.detect_projection,
                          "projection_scale": f_det,
                          "frames": detect_frames_used,
                          "projection_frames": int(acc.n_frames),
                          "key_frames": key_note,
                          "hot_pixels_masked": int(hot_flat.size),
                          "integration_pass": ("frames kept from the detection pass"
                                               if pass2_frames is not None else "decoded"),
                          "projection_dark": "master dark" if master is not None else
                          "first frame (no dark given)", **dict(found.provenance)}
        spot_set = SpotSet(found.spots, shape, found.backgrounds,
                           {"detected_from": str(rec.path), "method": settings.detect,
                            "projection": settings.detect_projection})
        timings["detect_pass_s"] = time.perf_counter() - t1
        if len(spot_set) == 0:
            tables = _empty_tables()
            prov = _provenance(rec, settings, choice, spot_path, dark_path, master, None,
                               detection_info, {}, timings, started, t_start, acc.n_frames, 0)
            return MeasureResult(tables[0], tables[1], spot_set, projection_max, projection_sum,
                                 (), None, prov)
    else:
        projection_max = np.full(shape, np.nan, np.float32)

    # ---------------------------------------------------------- pass 2: integration
    t2 = time.perf_counter()
    integ = SpotIntegrator(spot_set, shape, annulus_inner=settings.annulus_inner,
                           annulus_outer=settings.annulus_outer, annulus_px=settings.annulus_px,
                           annulus_min_px=settings.annulus_min_px,
                           pad_px=int(math.ceil(settings.max_shift_px)) + 1,
                           clip_sigma=settings.background_clip_sigma,
                           estimator=settings.background_estimator)
    region = integ.region
    if shifts:  # the full detection pass measured every frame's shift
        tracker = None
    elif detection_info.get("frames") == "key":
        # Continue the key-frame pass's tracker: same reference, so the shifts share the
        # origin of the projection the spots were found on.
        tracker = pass1_tracker.resume() if pass1_tracker is not None else None
    else:
        tracker = new_tracker()
    crop_acc = (ProjectionAccumulator(integ.geometry.shape, keep_sum=False)
                if detection_info == {} else None)
    exposures: list[float | None] = []
    clipped_any = False
    n_pass1 = len(shifts)
    # The overlay's max projection (spots given) from every k-th frame: an emission lasts
    # many frames, and the projection is for display and the batch sharpness check.
    proj_every = max(1, min(PROJECTION_EVERY, (rec.n_frames or 0) // 100))
    index = 0
    hot_fill: tuple[NDArray[np.intp], NDArray[np.intp], NDArray[np.float32]] | None = None
    with _progress(rec.n_frames, "measure", progress) as bar:
        for frame in (pass2_frames if pass2_frames is not None else rec.frames()):
            if n_pass1:
                if index >= n_pass1:
                    raise InputFormatError("the recording yielded more frames on the second "
                                           "pass than on the first; is it still being written?",
                                           path=rec.path)
                sh = shifts[index]
            elif tracker is not None:
                sh = tracker.update(drift_plane(frame, channel))
                shifts.append(sh)
            else:
                sh = (0.0, 0.0, 0.0, False)
                shifts.append(sh)
            # Codes and their table when one applies (no dark: a subtracted dark makes
            # every pixel's value its own): the integrator then reads only the pixels it
            # uses and sorts codes, not floats. The whole crop is converted only for the
            # first frame (hot pixels) and the frames of the overlay projection.
            coded = (code_values(frame, channel, spec, region=region, lazy=True)
                     if master is None else None)
            project = crop_acc is not None and index % proj_every == 0
            lin = None
            if coded is None:
                lin = linear(frame, region)
            elif hot_fill is None or project:
                lin = coded.values()
            if hot_fill is None:
                assert lin is not None
                hot_fill = _hot_pixel_fill(
                    lin, None if master is None else hot_pixel_map(master)[region])
            fill = None
            if hot_fill[0].size:
                if lin is not None:
                    flat = lin.reshape(-1)
                    flat[hot_fill[0]] = (flat[hot_fill[1]] * hot_fill[2]).sum(axis=1)
                    fill = flat[hot_fill[0]]
                else:  # the same numbers from the codes of the (non-hot) neighbours
                    assert coded is not None
                    nb = np.take(coded.table, coded.codes_at(hot_fill[1].reshape(-1))
                                 ).reshape(hot_fill[1].shape)
                    fill = (nb * hot_fill[2]).sum(axis=1)
            def saturated(frame: Any = frame, hot: NDArray[np.intp] = hot_fill[0]
                          ) -> NDArray[np.bool_]:
                sat = saturation_mask(frame, channel, region=region,
                                      level=settings.saturation_level)
                if hot.size:
                    # A hot pixel sits at the top code in every frame whatever the light:
                    # it was replaced above, so it must not mark the spot saturated either.
                    sat.flat[hot] = False
                return sat

            # The mask is made only when an aperture pixel's Y' reaches the floor (the
            # integrator reads the codes it uses anyway).
            floor = (saturation_floor(frame, region=region, level=settings.saturation_level)
                     if coded is not None else None)
            integ.add(lin, time_s=frame.time_s, shift_px=(sh[0], sh[1]),
                      saturated_crop=saturated if floor is not None else saturated(),
                      saturation_floor=floor, coded=coded, replaced=hot_fill[0],
                      replaced_values=fill)
            clipped_any |= integ.clip_shift(sh[0], sh[1])[2]
            if project:
                assert crop_acc is not None and lin is not None
                crop_acc.add(lin, (int(round(sh[0])), int(round(sh[1]))))
            exposures.append(frame.exposure_s)
            index += 1
            bar.update(1)
    if index == 0:
        raise InputFormatError("the recording holds no frames", path=rec.path)
    if n_pass1 and index != n_pass1:
        raise InputFormatError(f"the recording yielded {index} frames on the second pass but "
                               f"{n_pass1} on the first", path=rec.path)
    if crop_acc is not None:
        projection_max[region] = crop_acc.max
    timings["integrate_pass_s"] = time.perf_counter() - t2

    # ---------------------------------------------------------- noise, signals, metrics
    if settings.read_var is not None and settings.gain is not None:
        noise = NoiseModel(float(settings.read_var), float(settings.gain), settings.noise_source, 0)
    else:
        noise = estimate_noise_model(*integ.noise_observations())
    exp = np.array([e if e is not None else (settings.exposure_s or math.nan) for e in exposures])
    per_second = settings.per_exposure and bool(np.isfinite(exp).all())
    scale = 1.0 / exp if per_second else None
    sig = integ.signals(noise, scale=scale)
    t = integ.raw_arrays()["time_s"]
    shift_arr = integ.raw_arrays()["shift"]
    known = exp[np.isfinite(exp)]
    exposure_changed = known.size > 1 and float(known.max() - known.min()) > 0.01 * float(known.min())
    shift_mag = np.hypot(shift_arr[:, 0], shift_arr[:, 1])
    # Per frame: beyond the limit, or limited to the crop margin (masks not moved fully).
    frame_drifted = (shift_mag > settings.max_shift_px) | \
        (np.rint(shift_arr[:, 0]) != shift_arr[:, 2]) | (np.rint(shift_arr[:, 1]) != shift_arr[:, 3])
    drifted = bool(clipped_any or frame_drifted.any())

    curve_set = CurveSettings(
        baseline_end_s=(None if settings.baseline_s is None else float(t[0] + settings.baseline_s)),
        onset_k_sigma=settings.onset_k_sigma, onset_min_frames=settings.onset_min_frames,
        smooth_frames=settings.smooth_frames, min_snr=settings.min_snr)
    n = len(spot_set)

    def all_metrics(cs: CurveSettings) -> list[CurveMetrics]:
        return [curve_metrics(t, sig["signal"][:, k], sig["signal_se"][:, k],
                              saturated_px=sig["saturated_px"][:, k], settings=cs) for k in range(n)]

    metrics = all_metrics(curve_set)
    baseline_rule = "given" if settings.baseline_s is not None else "per spot (first 5 %)"
    if settings.baseline_s is None:
        # One baseline window for every spot: the frames before the earliest onset
        # (one frame of guard), so that blanks and standards share it.
        onsets = [m.onset_s for m in metrics if math.isfinite(m.onset_s)]
        if onsets:
            before = np.flatnonzero(t < min(onsets))
            if before.size >= 4:
                end = float(t[before[-2]])
                curve_set = replace(curve_set, baseline_end_s=end)
                metrics = all_metrics(curve_set)
                baseline_rule = f"common: frames up to {end:.6g} s (before the earliest onset)"
    # Compressed or spatially correlated noise: when the baseline scatter exceeds the
    # model SE (median ratio over spots, >= 8 baseline frames), scale every SE by it.
    se_scale = 1.0
    ratios = [m.noise_ratio for m in metrics if math.isfinite(m.noise_ratio)]
    if settings.scale_se_to_baseline and ratios and min(m.baseline_frames for m in metrics) >= 8:
        se_scale = max(1.0, float(np.median(ratios)))
        if se_scale > 1.0:
            sig["signal_se"] = sig["signal_se"] * se_scale
            sig["background_se"] = sig["background_se"] * se_scale
            metrics = [replace(m2, noise_ratio=m.noise_ratio) for m, m2 in
                       zip(metrics, all_metrics(curve_set))]
    extra_flags = (["drifted"] if drifted else []) + (["exposure_changed"] if exposure_changed else [])
    if extra_flags:
        metrics = [replace(m, flags=tuple(m.flags) + tuple(extra_flags)) for m in metrics]

    # ---------------------------------------------------------- tables
    g = integ.geometry
    bg_med = np.nanmedian(sig["background"], axis=0)
    rows = []
    for k, (s, m) in enumerate(zip(spot_set.spots, metrics)):
        md = m.to_dict()
        rows.append({
            "spot": s.number, "x_px": s.x_px, "y_px": s.y_px, "radius_px": s.radius_px,
            "area_px": float(g.area[k]), "background": float(bg_med[k]),
            **{c: md[c] for c in ("peak", "time_to_peak_s", "onset_s", "fwhm_s", "time_above_s",
                                  "integral", "integral_se", "snr", "saturated_frames", "flags",
                                  "peak_se", "time_to_peak_se_s", "baseline", "baseline_sd",
                                  "baseline_frames", "peak_raw", "integral_raw", "peak_snr",
                                  "noise_ratio")},
            "label": s.label, "shape": s.shape, "background_px": int(g.bg_n[k]),
            "annulus_inner_px": g.annulus_px[k][0], "annulus_outer_px": g.annulus_px[k][1]})
    spots_table = pd.DataFrame(rows, columns=list(SPOTS_COLUMNS))
    n_frames = t.size
    curves_table = pd.DataFrame({
        "spot": np.repeat([s.number for s in spot_set.spots], n_frames),
        "frame": np.tile(np.arange(n_frames), n),
        "time_s": np.tile(t, n),
        "signal": sig["signal"].T.ravel(),
        "signal_se": sig["signal_se"].T.ravel(),
        "background": sig["background"].T.ravel(),
        "saturated_px": sig["saturated_px"].T.ravel(),
        "shift_x_px": np.tile(shift_arr[:, 0], n),
        "shift_y_px": np.tile(shift_arr[:, 1], n),
        "drifted": np.tile(frame_drifted, n),
    }, columns=list(CURVES_COLUMNS))
    measured = [s for s in shifts if s[3]]
    drift_info = {
        "enabled": settings.drift, "frames_measured": len(measured),
        "max_shift_px": float(shift_mag.max()) if shift_mag.size else 0.0,
        "limit_px": settings.max_shift_px, "clipped": bool(clipped_any), "drifted": drifted,
        "frames_drifted": int(frame_drifted.sum()),
        "method": "phase correlation (the estimator of cv2.phaseCorrelate, on cached "
                  "spectra) of the luma/channel plane block-averaged to <= %d px, "
                  "sub-pixel refined; masks moved by whole pixels"
                  % settings.drift_target_px if settings.drift else "off"}
    analysis = {
        "noise_model": noise.to_dict(), "baseline": baseline_rule,
        "se_scale": se_scale,
        "se_scale_rule": "signal_se multiplied by the median over spots of (baseline SD / "
                         "model SE) when that exceeds 1 and every spot has >= 8 baseline frames"
                         if settings.scale_se_to_baseline else "off",
        "signal_unit": "linear full-scale units per second (FS/s), summed over the aperture"
        if per_second else "linear full-scale units (FS) per frame, summed over the aperture",
        "integral_unit": "FS" if per_second else "FS x s",
        "per_exposure": per_second, "exposure_changed": bool(exposure_changed),
        "drift": drift_info, "crop": [region[0].start, region[0].stop, region[1].start,
                                      region[1].stop],
        "hot_pixels_filled": 0 if hot_fill is None else int(hot_fill[0].size),
        "projection_every": proj_every if crop_acc is not None else 1,
        "hot_pixel_rule": "isolated pixels of the first frame's crop (and the master dark's "
                          "hot pixels) replaced in every frame by the mean of their 4 "
                          "non-hot neighbours",
        "saturated_integral_rule": "NaN integral, integral_se, peak, peak_se and snr; flag "
                                   "'saturated'; raw values in integral_raw/peak_raw",
    }
    timings["total_s"] = time.perf_counter() - t_start
    prov = _provenance(rec, settings, choice, spot_path, dark_path, master, noise,
                       detection_info, analysis, timings, started, t_start, n_frames, n)
    return MeasureResult(spots_table, curves_table, spot_set, projection_max, projection_sum,
                         tuple(metrics), noise, prov)


def _provenance(rec: Any, settings: MeasureSettings, choice: dict[str, str],
                spot_path: Path | None, dark_path: Path | None, master: Any,
                noise: NoiseModel | None, detection: dict[str, Any], analysis: dict[str, Any],
                timings: dict[str, float], started: str, t_start: float, n_frames: int,
                n_spots: int) -> dict[str, Any]:
    files = list(getattr(rec, "files", ()) or [rec.path])
    inputs: dict[str, Any] = {
        "recording": {"path": str(rec.path), "kind": rec.kind, "shape": list(rec.shape),
                      "n_frames": n_frames, "files": _file_entries(files),
                      "metadata": to_jsonable(dict(rec.metadata))}}
    if dark_path is not None:
        inputs["dark"] = {"path": str(dark_path), "files": _file_entries(_dark_files(dark_path)),
                          "n_frames": master.n_frames, "method": master.method}
    elif master is not None:
        inputs["dark"] = {"path": None, "n_frames": master.n_frames, "method": master.method,
                          "provenance": to_jsonable(dict(master.provenance))}
    if spot_path is not None:
        inputs["spots"] = _file_entries([spot_path])[0] if spot_path.is_file() else str(spot_path)
    frames_total = float(timings.get("total_s", time.perf_counter() - t_start))
    return {
        "tool": "ecl-quant measure",
        "started_utc": started,
        "inputs": inputs,
        "settings": settings.to_dict(),
        "transfer": choice,
        "spots_source": "file" if spot_path is not None else
                        ("given" if not detection else "detected"),
        "n_spots": n_spots,
        "detection": to_jsonable(detection),
        "analysis": to_jsonable(analysis),
        "versions": _versions(),
        "timings": {**{k: round(v, 4) for k, v in timings.items()},
                    "frames_per_s": round(n_frames * max(1, 1 + bool(detection)) / frames_total, 2)
                    if frames_total > 0 else None},
        "cautions": "Research measurement, not a certified analytical method.",
    }



# ------------------------------------------------------------------ outputs


def check_output_dir(out_dir: str | Path, *, force: bool = False) -> Path:
    """Refuse an existing non-empty folder unless ``force``; a file is always refused.

    A folder that a writer left unfinished (its hidden ``.ecl-quant-writing`` marker still
    there, no ``run.json``, nothing but measure outputs) is completed without ``force``:
    the run was interrupted, e.g. killed.

    Raises
    ------
    OutputError
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise OutputError("exists and is not a folder; choose another --out", path=out)
    if out.is_dir() and not force:
        visible = [p for p in out.iterdir() if not p.name.startswith(".")]
        interrupted = (out / _WRITING_MARKER).is_file() and not (out / "run.json").exists() \
            and all(p.name in OUTPUT_FILES and p.is_file() for p in visible)
        if visible and not interrupted:
            raise OutputError("folder is not empty; pass --force to overwrite its files or "
                              "choose another --out", path=out)
    return out


def _stretch(img: NDArray[np.floating]) -> NDArray[np.float64]:
    a = np.asarray(img, dtype=np.float64)
    finite = np.isfinite(a)
    if not finite.any():
        return np.zeros_like(a)
    lo, hi = np.percentile(a[finite], [1.0, 99.9])
    if hi <= lo:
        hi = lo + 1.0
    x = np.clip((np.where(finite, a, lo) - lo) / (hi - lo), 0.0, 1.0)
    return np.arcsinh(10.0 * x) / np.arcsinh(10.0)


def render_overlay(result: MeasureResult, *, dpi: int = 100) -> bytes:
    """PNG of the max projection with numbered spot outlines and background annuli."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Circle, Polygon, Rectangle

    img = result.projection_max
    h, w = img.shape
    # 9 in wide, or the projection's own width when it is narrower (down to 6 in): a
    # 640 x 480 recording is drawn pixel for pixel instead of blown up 1.4x, and its PNG
    # has half the pixels to encode.
    width_in = min(9.0, max(6.0, w / dpi))
    fig = Figure(figsize=(width_in, max(2.5, width_in * h / w)), dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0.0, 0.0, 1.0, 1.0))
    ax.imshow(_stretch(img), cmap="gray", interpolation="nearest", vmin=0, vmax=1)
    tab = result.spots_table.set_index("spot") if len(result.spots_table) else None
    # add_artist, not add_patch: the view is set to the image below, so the data limits
    # that add_patch would update for every outline (a third of the drawing time) are
    # not needed.
    add = ax.add_artist
    for s in result.spot_set.spots:
        bad = tab is not None and isinstance(tab.loc[s.number, "flags"], str) and \
            "saturated" in tab.loc[s.number, "flags"]
        colour = "#ff5050" if bad else "#40d0ff"
        if s.shape == "circle":
            add(Circle((s.params[0], s.params[1]), s.params[2], fill=False,
                                edgecolor=colour, linewidth=1.2))
        elif s.shape == "rect":
            x0, y0, x1, y1 = s.params
            add(Rectangle((x0, y0), x1 - x0, y1 - y0, fill=False, edgecolor=colour,
                                   linewidth=1.2))
        else:
            add(Polygon(np.asarray(s.params).reshape(-1, 2), closed=True, fill=False,
                                 edgecolor=colour, linewidth=1.2))
        if tab is not None:
            r_in, r_out = tab.loc[s.number, "annulus_inner_px"], tab.loc[s.number, "annulus_outer_px"]
            if np.isfinite(r_in) and np.isfinite(r_out):
                for r in (r_in, r_out):
                    add(Circle((s.x_px, s.y_px), r, fill=False, edgecolor="#ffd040",
                                        linewidth=0.7, linestyle="--"))
        ax.text(s.x_px, s.y_px - s.radius_px - 2, str(s.number), color=colour, ha="center",
                va="bottom", fontsize=9, fontweight="bold")
    for b in result.spot_set.backgrounds:
        if b.shape == "rect":
            x0, y0, x1, y1 = b.params
            add(Rectangle((x0, y0), x1 - x0, y1 - y0, fill=False, edgecolor="#ffd040",
                                   linestyle="--"))
        elif b.shape == "circle":
            add(Circle(b.params[:2], b.params[2], fill=False, edgecolor="#ffd040",
                                linestyle="--"))
        else:
            add(Polygon(np.asarray(b.params).reshape(-1, 2), closed=True, fill=False,
                                 edgecolor="#ffd040", linestyle="--"))
    ax.set_xlim(-0.5, w - 0.5)
    ax.set_ylim(h - 0.5, -0.5)
    ax.set_axis_off()
    return figure_png(fig, dpi=dpi)


def render_curves(result: MeasureResult, *, dpi: int = 100) -> bytes:
    """PNG of every spot's net signal against time, onset (dot) and FWHM (bar) marked."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.collections import LineCollection
    from matplotlib.figure import Figure

    fig = Figure(figsize=(9.0, 5.0), dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    cur = result.curves_table
    unit = result.provenance.get("analysis", {}).get("signal_unit", "")
    # The onset dots and the FWHM bars of all spots are one artist each (drawing time
    # goes with the number of artists).
    onsets: list[tuple[float, float, str]] = []
    bars: list[tuple[list[tuple[float, float]], str]] = []
    for s, m in zip(result.spot_set.spots, result.metrics):
        d = cur[cur["spot"] == s.number]
        t, y = d["time_s"].to_numpy(float), d["signal"].to_numpy(float)
        line, = ax.plot(t, y, linewidth=1.0, label=f"{s.number}")
        c = line.get_color()
        if math.isfinite(m.onset_s):
            onsets.append((m.onset_s, float(np.interp(m.onset_s, t, y)), c))
        if math.isfinite(m.fwhm_s):
            half = m.baseline + 0.5 * m.peak_raw
            bars.append(([(m.fwhm_left_s, half), (m.fwhm_right_s, half)], c))
    if onsets:
        ax.scatter([o[0] for o in onsets], [o[1] for o in onsets], s=16,
                   c=[o[2] for o in onsets], zorder=3)
    if bars:
        ax.add_collection(LineCollection([b[0] for b in bars], colors=[b[1] for b in bars],
                                         linewidths=2.5, alpha=0.6))
    ax.set_xlabel("time (s)")
    ax.set_ylabel("net spot signal" + (f"\n({unit.split(',')[0]})" if unit else ""))
    ax.axhline(0.0, color="0.6", linewidth=0.6)
    if result.spot_set.spots:
        ax.legend(title="spot", fontsize=7, ncol=2, loc="upper right")
    ax.set_title("dots: onset; bars: full width at half maximum", fontsize=9)
    # Fixed margins (room for two-line y labels and 7-character tick labels): a tight
    # layout would draw the figure twice.
    fig.subplots_adjust(left=0.13, right=0.98, bottom=0.1, top=0.93)
    return figure_png(fig, dpi=dpi)


def write_measure_outputs(result: MeasureResult, out_dir: str | Path, *,
                          force: bool = False) -> list[Path]:
    """Write spots.csv, curves.csv, spots.json, run.json, overlay.png and curves.png.

    Every file is rendered in memory first and then written atomically (temporary file
    + rename), so a failure never leaves a half-written file in ``out_dir``.

    Parameters
    ----------
    result : MeasureResult
    out_dir : str or Path
        Created when missing; an existing non-empty folder needs ``force``.
    force : bool

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    OutputError
        Existing non-empty folder without ``force``, or the folder cannot be written.
    """
    out = check_output_dir(out_dir, force=force)
    contents: dict[str, bytes] = {
        "spots.csv": result.spots_table.to_csv(index=False, float_format="%.9g").encode(),
        "curves.csv": result.curves_table.to_csv(index=False, float_format="%.9g").encode(),
        "spots.json": (json.dumps(spots_to_dict(result.spot_set), indent=2) + "\n").encode(),
        "overlay.png": render_overlay(result),
        "curves.png": render_curves(result),
    }
    run = dict(result.provenance)
    run["outputs"] = list(OUTPUT_FILES)
    run["written_utc"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
    contents["run.json"] = (json.dumps(to_jsonable(run), indent=2) + "\n").encode()
    ensure_dir(out)
    # A marker first, run.json removed, run.json written last, marker removed: a process
    # killed mid-way leaves no mix of two runs that looks complete, and the rerun knows
    # the files are its own unfinished outputs.
    with atomic_write(out / _WRITING_MARKER, "w") as fh:
        fh.write("measure outputs being written; removed when run.json is complete\n")
    (out / "run.json").unlink(missing_ok=True)
    for stale in out.glob(".*.tmp"):  # temporary files of a writer that was killed
        if any(stale.name.startswith(f".{name}.") for name in OUTPUT_FILES):
            stale.unlink(missing_ok=True)
    written = []
    for name in sorted(OUTPUT_FILES, key=lambda n: n == "run.json"):
        with atomic_write(out / name, "wb") as fh:
            fh.write(contents[name])
        written.append(out / name)
    (out / _WRITING_MARKER).unlink(missing_ok=True)
    return written


def summary_table(result: MeasureResult) -> str:
    """A short fixed-width table (spot, x, y, peak, time to peak, integral, SE, flags)."""
    t = result.spots_table
    if t.empty:
        return "no spots"
    cols = [("spot", "{:d}"), ("x_px", "{:.1f}"), ("y_px", "{:.1f}"), ("peak", "{:.4g}"),
            ("time_to_peak_s", "{:.3f}"), ("integral", "{:.4g}"), ("integral_se", "{:.2g}"),
            ("snr", "{:.1f}"), ("flags", "{}")]
    header = ["spot", "x", "y", "peak", "t_peak_s", "integral", "se", "snr", "flags"]
    body = []
    for _, r in t.iterrows():
        cells = []
        for (c, f), _h in zip(cols, header):
            v = r[c]
            if c == "spot":
                cells.append(str(int(v)))
            elif c == "flags":
                cells.append(str(v) if isinstance(v, str) and v else "-")
            else:
                cells.append("nan" if v is None or not np.isfinite(float(v)) else f.format(float(v)))
        body.append(cells)
    widths = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(header)]
    lines = ["  ".join(h.rjust(w) for h, w in zip(header, widths))]
    lines += ["  ".join(c.rjust(w) for c, w in zip(b, widths)) for b in body]
    return "\n".join(lines)

