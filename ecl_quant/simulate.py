"""Synthetic ECL recordings with known ground truth.

A recording shows ``n_rows x n_cols`` electrode spots on a card. Each spot emits one
ECL pulse (a difference of exponentials: first-order rise and decay from an onset, see
:func:`ecl_pulse`); the frames go through a simple sensor model and are written as sRGB
stills (JPEG or PNG with EXIF), 16-bit linear TIFF stills (with EXIF), or BT.709 H.264
video. The ground truth (spot positions, pulse parameters, exact integrals, frame times,
hot pixels, drift) is returned as a :class:`RecordingTruth` and can be written to JSON.

Conventions
-----------
Pixel coordinates
    Pixel ``(row, col)`` has its centre at ``(x_px, y_px) = (col, row)``; ``x`` grows to
    the right, ``y`` downwards (the OpenCV / scikit-image convention).
Linear units
    Light is in **linear full-scale units** (FS): a pixel value as a fraction of the
    sensor's full scale, before any transfer function (see DEVELOPERS.md).
Exposure
    Every light source has a *rate* in FS per second. Frame ``i`` with exposure
    ``e_i`` centred at time ``t_i`` holds, per pixel, the light integrated over the
    window ``[t_i - e_i/2, t_i + e_i/2]``; for a constant rate that is ``rate * e_i``.
    Options that set light levels (``background_rgb``, ``ambient_fs``, ``amplitudes``)
    are the values per frame at the base exposure ``exposure_s``, so the rate is
    ``value / exposure_s``. A pipeline that divides each frame by its exposure time gets
    rates (FS/s) back, and integrates them over time to (FS/s) x s.
Spot truth
    ``SpotTruth.integral`` is the time integral, over the recorded span (first to last
    frame time), of the spot's net signal in the red channel: the sum over all pixels of
    the spot's own light after removing dark level and background, divided by the
    exposure time. Unit: (FS/s) x s, summed over pixels. It is exact (closed form).
    ``integral_in_disk`` is the part of it inside the geometric disk of ``radius_px``
    (continuous overlap); the spot edge is a logistic ramp of scale ``edge_px``, so an
    aperture of ``radius_px + 10 * edge_px`` collects the whole ``integral`` to better
    than 1e-4. Green and blue carry ``channel_factors`` times the red light.
Frame times
    Stills: EXIF DateTimeOriginal + SubSecTimeOriginal (milliseconds), so frame times
    are rounded to 1 ms (16-bit TIFF too: its Exif IFD holds the same tags). Video: pts
    in a 1/600 s time base, so times are multiples of 1/600 s; video carries no exposure
    time, so a pipeline that cannot divide by it gets ``integral * exposure_s``. The
    truth holds the times exactly as encoded, and the light is integrated around them.

Sensor model, per frame and colour channel: linear scene (card background + ambient
leak + spots) -> electrons via ``gain_e_per_fs`` (electrons per full scale) -> Poisson
shot noise (or a normal draw of the same variance, ``shot_noise="gaussian"``) ->
+ Gaussian read noise (``read_noise_fs``) + dark level (``dark_level_fs``) + hot pixels
-> clipped to [0, 1] (saturation) -> encoded. The per-pixel variance of a
frame is ``read_noise_fs**2 + signal / gain_e_per_fs`` (EMVA 1288 linear model).
Hand tremor moves the card (background is uniform, spots move) by a random walk of
sub-pixel shifts; the ambient leak and hot pixels are fixed to the sensor.

Every random draw comes from ``numpy.random.default_rng([seed, stream])``, with separate
streams for the sensor (hot pixels), the timing and drift, the recording noise and the
dark-frame noise, so results are reproducible and darks share the recording's hot pixels.
"""

from __future__ import annotations

import datetime as _dt
import math
import struct
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field, fields, replace
from fractions import Fraction
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ._io import atomic_write, ensure_dir, to_jsonable, write_json_atomic
from .errors import InputFormatError, OutputError, SpotError
from .transfer import bt709_encode, srgb_encode

__all__ = [
    "ENCODINGS",
    "RecordingTruth",
    "SimulationSpec",
    "SpotTruth",
    "ecl_pulse",
    "ecl_pulse_antiderivative",
    "ecl_pulse_peak_delay",
    "load_truth",
    "render_linear_frames",
    "simulate_darks",
    "simulate_recording",
    "spot_flux_px",
    "spot_flux_within",
    "spot_profile",
    "truth_path",
    "write_truth",
]

Encoding = Literal["jpeg", "png", "tiff16", "h264"]
ENCODINGS: tuple[str, ...] = ("jpeg", "png", "tiff16", "h264")

SIMULATOR_VERSION = 1

# ITU-R BT.709-6 item 3.2/3.3: luma coefficients.
_KR, _KB = 0.2126, 0.0722
_KG = 1.0 - _KR - _KB
# H.273 / FFmpeg enumerations: 1 = BT.709 for matrix, primaries and transfer; range 1 = MPEG.
_AV_BT709 = 1
_AV_RANGE_MPEG = 1
_VIDEO_TIME_BASE = Fraction(1, 600)

# Random streams (second element of the seed sequence).
_STREAM_SENSOR = 1
_STREAM_TIMING = 2
_STREAM_NOISE = 3
_STREAM_DARK = 4

_EXIF_IFD = 0x8769
_TAG_MAKE, _TAG_MODEL, _TAG_ORIENTATION, _TAG_DATETIME = 0x010F, 0x0110, 0x0112, 0x0132
_TAG_EXPOSURE, _TAG_ISO = 0x829A, 0x8827
_TAG_DT_ORIGINAL, _TAG_SUBSEC_ORIGINAL = 0x9003, 0x9291
_CAMERA_MAKE = "ecl_quant"
_CAMERA_MODEL = "simulated sensor"


# ----------------------------------------------------------------------------- pulse


def ecl_pulse_peak_delay(rise_s: float, decay_s: float) -> float:
    """Delay from onset to the maximum of the difference-of-exponentials pulse, in s.

    ``t_peak = ln(decay/rise) * rise * decay / (decay - rise)``.
    """
    return math.log(decay_s / rise_s) * rise_s * decay_s / (decay_s - rise_s)


def _pulse_norm(rise_s: float, decay_s: float) -> float:
    tp = ecl_pulse_peak_delay(rise_s, decay_s)
    return math.exp(-tp / decay_s) - math.exp(-tp / rise_s)


def ecl_pulse(
    time_s: ArrayLike, *, onset_s: float, rise_s: float, decay_s: float
) -> NDArray[np.float64]:
    """ECL pulse shape, normalised to a maximum of 1.

    ``g(t) = (exp(-(t - t0)/decay) - exp(-(t - t0)/rise)) / g_max`` for ``t >= t0``,
    0 before the onset ``t0``: a first-order rise with time constant ``rise_s`` and a
    first-order decay with ``decay_s`` (``decay_s > rise_s``).

    Parameters
    ----------
    time_s : array_like of float
        Times in seconds.
    onset_s, rise_s, decay_s : float
        Onset time and the two time constants, in seconds.

    Returns
    -------
    ndarray of float64, same shape as ``time_s``
    """
    _check_pulse(rise_s, decay_s)
    tau = np.asarray(time_s, dtype=np.float64) - onset_s
    pos = np.maximum(tau, 0.0)
    g = (np.exp(-pos / decay_s) - np.exp(-pos / rise_s)) / _pulse_norm(rise_s, decay_s)
    return np.where(tau > 0.0, g, 0.0)


def ecl_pulse_antiderivative(
    time_s: ArrayLike, *, onset_s: float, rise_s: float, decay_s: float
) -> NDArray[np.float64]:
    """``G(t) = integral of ecl_pulse from -inf to t`` (closed form), in s.

    ``G(t) = (decay (1 - exp(-tau/decay)) - rise (1 - exp(-tau/rise))) / g_max`` with
    ``tau = t - onset >= 0``; ``G(inf) = (decay - rise) / g_max``.
    """
    _check_pulse(rise_s, decay_s)
    tau = np.maximum(np.asarray(time_s, dtype=np.float64) - onset_s, 0.0)
    big = decay_s * -np.expm1(-tau / decay_s) - rise_s * -np.expm1(-tau / rise_s)
    return big / _pulse_norm(rise_s, decay_s)


def _check_pulse(rise_s: float, decay_s: float) -> None:
    if not (rise_s > 0 and decay_s > rise_s and math.isfinite(decay_s)):
        raise InputFormatError(
            f"pulse time constants rise_s={rise_s!r}, decay_s={decay_s!r} are invalid; "
            "use 0 < rise_s < decay_s"
        )


# ------------------------------------------------------------------------ spot shape


def spot_profile(rho_px: ArrayLike, *, radius_px: float, edge_px: float) -> NDArray[np.float64]:
    """Radial spot profile: a disk with a logistic edge, 1 at the centre, 0.5 at ``radius_px``.

    ``w(rho) = 1 / (1 + exp((rho - radius_px) / edge_px))``.
    """
    z = (np.asarray(rho_px, dtype=np.float64) - radius_px) / edge_px
    return 0.5 * (1.0 - np.tanh(0.5 * z))  # = 1/(1+exp(z)), without overflow


def spot_flux_px(radius_px: float, edge_px: float) -> float:
    """Integral of :func:`spot_profile` over the plane, in pixels (area-equivalent).

    ``2 pi int_0^inf rho w(rho) d rho = -2 pi s^2 Li2(-exp(R/s))``
    ``= pi (R^2 + pi^2 s^2 / 3) + 2 pi s^2 Li2(-exp(-R/s))`` (Fermi-Dirac integral of
    order 1, with the dilogarithm inversion formula); the last term is summed as the
    alternating series ``sum_k (-1)^k exp(-k R/s) / k^2``.
    """
    x = radius_px / edge_px
    q = math.exp(-x)
    li2, term_k = 0.0, 1
    while True:
        term = (-1.0) ** term_k * q**term_k / term_k**2
        li2 += term
        if abs(term) < 1e-18 or term_k > 100_000:
            break
        term_k += 1
    return (
        math.pi * (radius_px**2 + math.pi**2 * edge_px**2 / 3.0) + 2.0 * math.pi * edge_px**2 * li2
    )


def spot_flux_within(r_px: float, *, radius_px: float, edge_px: float) -> float:
    """Integral of :func:`spot_profile` over the disk ``rho <= r_px``, in pixels.

    Computed numerically (composite Simpson rule on 20001 points, relative error
    below 1e-9 for the profiles used here).
    """
    if r_px <= 0:
        return 0.0
    rho = np.linspace(0.0, r_px, 20001)
    f = 2.0 * math.pi * rho * spot_profile(rho, radius_px=radius_px, edge_px=edge_px)
    h = rho[1] - rho[0]
    return float(h / 3.0 * (f[0] + f[-1] + 4.0 * f[1:-1:2].sum() + 2.0 * f[2:-1:2].sum()))


def _spot_half_box(radius_px: float, edge_px: float) -> int:
    # Beyond R + 20 s the profile is below exp(-20) = 2e-9.
    return math.ceil(radius_px + 20.0 * edge_px) + 1


# -------------------------------------------------------------------------- the spec


def _tuple_or_float(value: Any, name: str) -> float | tuple[float, ...]:
    if isinstance(value, (int, float, np.floating, np.integer)):
        return float(value)
    try:
        return tuple(float(v) for v in value)
    except TypeError as err:
        raise InputFormatError(f"{name} must be a number or a sequence of numbers") from err


@dataclass(frozen=True)
class SimulationSpec:
    """Every option of a simulated recording.

    Light levels are linear full-scale units (FS) per frame at the base exposure
    ``exposure_s`` (rate = value / exposure_s); see the module docstring.

    Attributes
    ----------
    size : (int, int)
        Frame (height, width) in pixels.
    n_rows, n_cols : int
        Spot grid; spots are numbered 1.. row-major.
    radius_px : float
        Spot radius (where the profile is at half its centre value).
    spacing_px : float or None
        Centre-to-centre distance of neighbouring spots; None: ``3 * radius_px``.
    edge_px : float
        Scale of the logistic spot edge (10-90 % width = 4.39 edge_px).
    amplitudes : sequence of float or None
        Peak linear value of the spot centre in the red channel, per spot (FS per frame
        at ``exposure_s``, i.e. ``peak rate * exposure_s``). None: geometric series from
        0.02 to 0.3.
    emitter_rgb : (float, float, float)
        Spot light in (red, green, blue) relative to red (Ru(bpy)3 2+ emits near 620 nm).
    onset_s, rise_s, decay_s : float or sequence of float
        Pulse onset time and time constants (s), one value or one per spot.
    n_frames : int
    fps : float
        Nominal frame rate.
    vfr : bool
        Irregular frame intervals (nominal interval x U(1 - vfr_jitter, 1 + vfr_jitter),
        and a dropped frame with probability ``vfr_drop``).
    vfr_jitter, vfr_drop : float
    exposure_s : float
        Base exposure time in seconds.
    exposure_change : (int, float) or None
        From this frame index on the exposure becomes the given value (auto-exposure).
    iso : int
        ISO written to EXIF (metadata only; the gain is ``gain_e_per_fs``).
    gain_e_per_fs : float
        Electrons per full scale (shot noise: variance = signal / gain in FS^2).
    shot_noise : {"poisson", "gaussian"}
        Exact Poisson electrons, or a normal draw with the same variance (about 5x
        faster on large frames; skewness 1/sqrt(electrons) is lost).
    read_noise_fs : float
        Read noise standard deviation, FS.
    dark_level_fs : float
        Dark offset (pedestal) added to every pixel, FS.
    background_rgb : (float, float, float)
        Uniform card background, FS per frame at ``exposure_s``.
    ambient_fs : float
        Peak of the smooth ambient light leak (fixed to the sensor), FS per frame.
    ambient_rgb : (float, float, float)
        Colour of the ambient leak, relative.
    n_hot_pixels : int
        Hot pixels at fixed random coordinates (same in darks of the same seed).
    hot_level_fs : (float, float)
        Range of the hot pixels' extra level, FS (added to every channel).
    drift_px : float
        Largest scene shift (either axis) of the hand-tremor random walk; 0: none.
    saturate_spot : int or None
        Spot number whose amplitude is raised to ``saturate_amplitude``.
    saturate_amplitude : float
    encoding : {"jpeg", "png", "tiff16", "h264"}
    jpeg_quality : int
    jpeg_subsampling : {"4:4:4", "4:2:2", "4:2:0"}
    crf : int or None
        x264 constant rate factor (used when ``bitrate`` is None).
    bitrate : int or None
        Target bit rate in bit/s (average-bitrate mode instead of crf).
    video_preset : str
        x264 preset.
    gop_frames : int or None
        Longest key-frame interval of H.264 (x264 ``g``); None: x264's default (250).
        Phone encoders write a key frame about every second.
    start_time : str
        ISO date-time of the first frame (EXIF DateTimeOriginal).
    seed : int
    """

    size: tuple[int, int] = (120, 160)
    n_rows: int = 2
    n_cols: int = 4
    radius_px: float = 8.0
    spacing_px: float | None = None
    edge_px: float = 0.35
    amplitudes: tuple[float, ...] | None = None
    emitter_rgb: tuple[float, float, float] = (1.0, 0.22, 0.04)
    onset_s: float | tuple[float, ...] = 0.5
    rise_s: float | tuple[float, ...] = 0.25
    decay_s: float | tuple[float, ...] = 0.9
    n_frames: int = 60
    fps: float = 10.0
    vfr: bool = False
    vfr_jitter: float = 0.4
    vfr_drop: float = 0.1
    exposure_s: float = 1.0 / 30.0
    exposure_change: tuple[int, float] | None = None
    iso: int = 100
    gain_e_per_fs: float = 4000.0
    shot_noise: Literal["poisson", "gaussian"] = "poisson"
    read_noise_fs: float = 0.001
    dark_level_fs: float = 0.004
    background_rgb: tuple[float, float, float] = (0.030, 0.030, 0.027)
    ambient_fs: float = 0.02
    ambient_rgb: tuple[float, float, float] = (1.0, 0.9, 0.75)
    n_hot_pixels: int = 3
    hot_level_fs: tuple[float, float] = (0.3, 0.9)
    drift_px: float = 0.0
    saturate_spot: int | None = None
    saturate_amplitude: float = 1.5
    encoding: Encoding = "jpeg"
    jpeg_quality: int = 95
    jpeg_subsampling: str = "4:4:4"
    crf: int | None = 18
    bitrate: int | None = None
    video_preset: str = "veryfast"
    gop_frames: int | None = None
    start_time: str = "2024-05-14T09:30:00"
    seed: int = 0

    def __post_init__(self) -> None:
        # Normalise sequences to tuples so the spec stays hashable and JSON-friendly.
        set_ = object.__setattr__
        set_(self, "size", (int(self.size[0]), int(self.size[1])))
        if self.amplitudes is not None:
            set_(self, "amplitudes", tuple(float(a) for a in self.amplitudes))
        for name in ("onset_s", "rise_s", "decay_s"):
            set_(self, name, _tuple_or_float(getattr(self, name), name))
        for name in ("emitter_rgb", "background_rgb", "ambient_rgb", "hot_level_fs"):
            set_(self, name, tuple(float(v) for v in getattr(self, name)))
        if self.exposure_change is not None:
            k, e = self.exposure_change
            set_(self, "exposure_change", (int(k), float(e)))
        self._validate()

    # The checks raise InputFormatError / SpotError with what to change.
    def _validate(self) -> None:
        h, w = self.size
        if h < 8 or w < 8:
            raise InputFormatError(f"size {self.size} is too small; use at least (8, 8)")
        if self.encoding not in ENCODINGS:
            raise InputFormatError(
                f"unknown encoding {self.encoding!r}; use one of {', '.join(ENCODINGS)}"
            )
        if self.encoding == "h264" and (h % 2 or w % 2):
            raise InputFormatError(f"H.264 4:2:0 needs an even frame size, got {h}x{w}")
        if self.n_rows < 0 or self.n_cols < 0:
            raise SpotError("n_rows and n_cols must be >= 0")
        if self.n_frames < 1:
            raise InputFormatError("n_frames must be >= 1")
        for name in ("fps", "exposure_s", "gain_e_per_fs", "radius_px", "edge_px"):
            if not getattr(self, name) > 0:
                raise InputFormatError(f"{name} must be > 0, got {getattr(self, name)!r}")
        if self.radius_px < 2 * self.edge_px:
            raise InputFormatError("edge_px must be at most radius_px / 2 (a disk, not a blur)")
        for name in ("read_noise_fs", "dark_level_fs", "ambient_fs", "drift_px"):
            if getattr(self, name) < 0:
                raise InputFormatError(f"{name} must be >= 0, got {getattr(self, name)!r}")
        if self.shot_noise not in ("poisson", "gaussian"):
            raise InputFormatError(
                f"shot_noise must be 'poisson' or 'gaussian', got {self.shot_noise!r}"
            )
        if not 0 <= self.vfr_jitter < 1 or not 0 <= self.vfr_drop < 1:
            raise InputFormatError("vfr_jitter and vfr_drop must be in [0, 1)")
        if self.exposure_change is not None and not self.exposure_change[1] > 0:
            raise InputFormatError("exposure_change exposure must be > 0")
        n = self.n_spots
        if self.amplitudes is not None and len(self.amplitudes) != n:
            raise InputFormatError(
                f"amplitudes has {len(self.amplitudes)} values for {n} spots "
                f"({self.n_rows} x {self.n_cols}); give one per spot"
            )
        for name in ("onset_s", "rise_s", "decay_s"):
            v = getattr(self, name)
            if isinstance(v, tuple) and len(v) != n:
                raise InputFormatError(f"{name} has {len(v)} values for {n} spots")
        for k in range(n):
            _check_pulse(self._per_spot("rise_s", k), self._per_spot("decay_s", k))
        if self.saturate_spot is not None and not 1 <= self.saturate_spot <= n:
            raise SpotError(f"saturate_spot={self.saturate_spot} is not a spot number 1..{n}")
        if self.jpeg_subsampling not in _JPEG_SUBSAMPLING:
            raise InputFormatError("jpeg_subsampling must be '4:4:4', '4:2:2' or '4:2:0'")
        if self.crf is None and self.bitrate is None and self.encoding == "h264":
            raise InputFormatError("give crf or bitrate for H.264")
        if self.gop_frames is not None and not int(self.gop_frames) >= 1:
            raise InputFormatError("gop_frames must be a whole number >= 1")
        try:
            _dt.datetime.fromisoformat(self.start_time)
        except ValueError as err:
            raise InputFormatError(
                f"start_time {self.start_time!r} is not an ISO date-time"
            ) from err
        if n:
            xs, ys = self.spot_centres()
            half = _spot_half_box(self.radius_px, self.edge_px) + math.ceil(self.drift_px) + 1
            if (
                xs.min() - half < 0
                or ys.min() - half < 0
                or xs.max() + half > w - 1
                or ys.max() + half > h - 1
            ):
                raise SpotError(
                    f"a {self.n_rows} x {self.n_cols} grid of radius {self.radius_px:g} px at "
                    f"spacing {self.spacing:g} px (plus drift) does not fit in {w}x{h}; "
                    "use a larger size, a smaller radius or spacing"
                )
            if n > 1 and self.spacing < 2 * self.radius_px + 4 * self.edge_px:
                raise SpotError(
                    f"spacing {self.spacing:g} px makes spots of radius {self.radius_px:g} overlap"
                )

    @property
    def n_spots(self) -> int:
        """Number of spots, ``n_rows * n_cols``."""
        return self.n_rows * self.n_cols

    @property
    def spacing(self) -> float:
        """Centre-to-centre spot distance in pixels."""
        return 3.0 * self.radius_px if self.spacing_px is None else float(self.spacing_px)

    def spot_centres(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """(x_px, y_px) of the spot centres, row-major, grid centred in the frame."""
        h, w = self.size
        cols = np.arange(self.n_cols) - (self.n_cols - 1) / 2.0
        rows = np.arange(self.n_rows) - (self.n_rows - 1) / 2.0
        yy, xx = np.meshgrid(rows, cols, indexing="ij")
        return (
            (w - 1) / 2.0 + xx.ravel() * self.spacing,
            (h - 1) / 2.0 + yy.ravel() * self.spacing,
        )

    def spot_amplitudes(self) -> NDArray[np.float64]:
        """Peak linear value per spot (red, FS per frame at ``exposure_s``)."""
        n = self.n_spots
        if self.amplitudes is not None:
            amp = np.array(self.amplitudes, dtype=np.float64)
        elif n == 1:
            amp = np.array([0.1])
        else:
            amp = np.geomspace(0.02, 0.3, n)
        if self.saturate_spot is not None:
            amp[self.saturate_spot - 1] = self.saturate_amplitude
        return amp

    def _per_spot(self, name: str, k: int) -> float:
        v = getattr(self, name)
        return float(v[k]) if isinstance(v, tuple) else float(v)

    def to_dict(self) -> dict[str, Any]:
        """The spec as a JSON-friendly dict (tuples become lists)."""
        return _jsonable(asdict(self))

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> SimulationSpec:
        """Inverse of :meth:`to_dict`; unknown keys raise InputFormatError."""
        names = {f.name for f in fields(cls)}
        unknown = set(data) - names
        if unknown:
            raise InputFormatError(f"unknown simulation options: {', '.join(sorted(unknown))}")
        kw = {k: (tuple(v) if isinstance(v, list) else v) for k, v in data.items()}
        return cls(**kw)


_JPEG_SUBSAMPLING = {"4:4:4": 0, "4:2:2": 1, "4:2:0": 2}


# ---------------------------------------------------------------------- truth records


@dataclass(frozen=True)
class SpotTruth:
    """Ground truth of one spot (red channel unless stated).

    Attributes
    ----------
    number : int
        1-based, row-major.
    row, col : int
        0-based grid position.
    x_px, y_px : float
        Centre in the first frame (drift is relative to it).
    radius_px, edge_px : float
        Half-maximum radius and logistic edge scale.
    amplitude_fs : float
        Peak centre value, FS per frame at the base exposure.
    peak_rate_fs_per_s : float
        ``amplitude_fs / exposure_s``: peak centre rate, FS/s.
    onset_s, rise_s, decay_s, peak_time_s : float
        Pulse onset, time constants and time of the maximum (s, recording time).
    flux_px : float
        Area-equivalent of the spot profile (its integral over the plane), px.
    in_disk_fraction : float
        Share of the spot's light inside the geometric disk of ``radius_px``.
    peak_signal : float
        Maximum of the net spot signal (all pixels), FS/s.
    integral : float
        Net spot signal integrated from the first to the last frame time, (FS/s) x s.
    integral_full : float
        The same over the whole pulse (onset to infinity).
    integral_in_disk : float
        ``integral * in_disk_fraction``.
    channel_factors : (float, float, float)
        Spot light in (red, green, blue) relative to red: multiply the red figures.
    background_fs : (float, float, float)
        Card background + ambient leak at the spot centre, FS per frame at base exposure.
    saturated : bool
        Whether the noiseless centre value reaches full scale in some frame.
    saturated_frames : tuple of int
        Frame indices where it does.
    """

    number: int
    row: int
    col: int
    x_px: float
    y_px: float
    radius_px: float
    edge_px: float
    amplitude_fs: float
    peak_rate_fs_per_s: float
    onset_s: float
    rise_s: float
    decay_s: float
    peak_time_s: float
    flux_px: float
    in_disk_fraction: float
    peak_signal: float
    integral: float
    integral_full: float
    integral_in_disk: float
    channel_factors: tuple[float, float, float]
    background_fs: tuple[float, float, float]
    saturated: bool
    saturated_frames: tuple[int, ...] = ()

    def rate(self, time_s: ArrayLike) -> NDArray[np.float64]:
        """Noiseless net spot signal (all pixels, red) at ``time_s``, FS/s."""
        return self.peak_signal * ecl_pulse(
            time_s, onset_s=self.onset_s, rise_s=self.rise_s, decay_s=self.decay_s
        )

    def integral_between(self, t0_s: float, t1_s: float) -> float:
        """Exact integral of :meth:`rate` over ``[t0_s, t1_s]``, (FS/s) x s."""
        g = ecl_pulse_antiderivative(
            np.array([t0_s, t1_s]), onset_s=self.onset_s, rise_s=self.rise_s, decay_s=self.decay_s
        )
        return float(self.peak_signal * (g[1] - g[0]))

    def flux_fraction_within(self, r_px: float) -> float:
        """Share of the spot's light inside a centred disk of radius ``r_px``."""
        return spot_flux_within(r_px, radius_px=self.radius_px, edge_px=self.edge_px) / self.flux_px


@dataclass(frozen=True)
class RecordingTruth:
    """Ground truth of a simulated recording (or of simulated dark frames).

    Attributes
    ----------
    path : str
        The folder of stills or the video file.
    files : tuple of str
        Every file written, in frame order.
    encoding : dict
        kind, transfer ("srgb" | "bt709" | "linear"), bit depth and codec settings.
    frame_times_s : tuple of float
        Time of every frame from the first, exactly as encoded.
    frame_exposure_s : tuple of float
        Exposure time of every frame.
    exposure_s : float
        Base exposure time.
    iso : int
    size : (int, int)
        (height, width).
    spots : tuple of SpotTruth
    hot_pixels : tuple of (int, int, float)
        (x_px, y_px, extra level in FS) of every hot pixel.
    dark_level_fs, read_noise_fs, gain_e_per_fs : float
    drift_px : tuple of (float, float)
        Scene shift (dx, dy) of every frame relative to the first, px.
    saturated_spots : tuple of int
        Numbers of spots with saturated frames.
    spec : dict
        The full SimulationSpec.
    is_dark : bool
        True for dark frames (no light).
    units : dict
        The conventions, in words.
    """

    path: str
    files: tuple[str, ...]
    encoding: dict[str, Any]
    frame_times_s: tuple[float, ...]
    frame_exposure_s: tuple[float, ...]
    exposure_s: float
    iso: int
    size: tuple[int, int]
    spots: tuple[SpotTruth, ...]
    hot_pixels: tuple[tuple[int, int, float], ...]
    dark_level_fs: float
    read_noise_fs: float
    gain_e_per_fs: float
    drift_px: tuple[tuple[float, float], ...]
    saturated_spots: tuple[int, ...]
    spec: dict[str, Any]
    is_dark: bool = False
    units: dict[str, str] = field(default_factory=lambda: dict(_UNITS))
    simulator_version: int = SIMULATOR_VERSION

    @property
    def n_frames(self) -> int:
        """Number of frames."""
        return len(self.frame_times_s)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-friendly dict (see :func:`write_truth`)."""
        return _jsonable(asdict(self))

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RecordingTruth:
        """Inverse of :meth:`to_dict`."""
        try:
            d = dict(data)
            d["spots"] = tuple(
                SpotTruth(
                    **{
                        **s,
                        "channel_factors": tuple(s["channel_factors"]),
                        "background_fs": tuple(s["background_fs"]),
                        "saturated_frames": tuple(s["saturated_frames"]),
                    }
                )
                for s in d["spots"]
            )
            for key in ("files", "frame_times_s", "frame_exposure_s", "saturated_spots"):
                d[key] = tuple(d[key])
            d["size"] = (int(d["size"][0]), int(d["size"][1]))
            d["hot_pixels"] = tuple((int(x), int(y), float(v)) for x, y, v in d["hot_pixels"])
            d["drift_px"] = tuple((float(a), float(b)) for a, b in d["drift_px"])
            return cls(**d)
        except (KeyError, TypeError, ValueError) as err:
            raise InputFormatError(f"not a simulator ground-truth record ({err})") from err

    def to_frame(self) -> Any:
        """The spots as a pandas DataFrame (one row per spot)."""
        import pandas as pd

        cols = [f.name for f in fields(SpotTruth)]
        rows = [_jsonable(asdict(s)) for s in self.spots]
        return pd.DataFrame(rows, columns=cols)

    @property
    def provenance(self) -> dict[str, Any]:
        """The parameters that made this recording."""
        return {
            "simulator_version": self.simulator_version,
            "spec": self.spec,
            "encoding": self.encoding,
        }


_UNITS = {
    "light": "linear full-scale units (FS): fraction of sensor full scale",
    "frame_value": "FS per frame = light rate (FS/s) integrated over the exposure window "
    "[t - e/2, t + e/2]; constant rate r gives r * exposure_s",
    "spec_levels": "background_rgb, ambient_fs, amplitudes: FS per frame at exposure_s",
    "integral": "(FS/s) x s summed over the spot's pixels: net red signal divided by "
    "exposure time, integrated from the first to the last frame time; without exposure "
    "metadata (video) a pipeline measures integral * exposure_s",
    "coordinates": "pixel (row, col) has centre (x_px, y_px) = (col, row)",
    "drift_px": "scene shift (dx, dy) relative to the first frame",
}


def _jsonable(obj: Any) -> Any:
    return to_jsonable(obj, nonfinite_to_null=False)


# -------------------------------------------------------------------- timing & drift


def _frame_times(spec: SimulationSpec, rng: np.random.Generator) -> NDArray[np.float64]:
    n = spec.n_frames
    dt = 1.0 / spec.fps
    if spec.vfr and n > 1:
        steps = dt * rng.uniform(1.0 - spec.vfr_jitter, 1.0 + spec.vfr_jitter, n - 1)
        steps = steps * np.where(rng.random(n - 1) < spec.vfr_drop, 2.0, 1.0)
        times = np.concatenate([[0.0], np.cumsum(steps)])
    else:
        times = np.arange(n) * dt
    if spec.encoding == "h264":
        ticks = _strictly_increasing(
            np.round(times * _VIDEO_TIME_BASE.denominator).astype(np.int64)
        )
        return ticks / _VIDEO_TIME_BASE.denominator
    if spec.encoding in ("jpeg", "png", "tiff16"):
        ms = _strictly_increasing(np.round(times * 1000.0).astype(np.int64))
        return ms / 1000.0
    return times


def _strictly_increasing(ticks: NDArray[np.int64]) -> NDArray[np.int64]:
    out = ticks.copy()
    for i in range(1, out.size):
        if out[i] <= out[i - 1]:
            out[i] = out[i - 1] + 1
    return out


def _drift(spec: SimulationSpec, rng: np.random.Generator) -> NDArray[np.float64]:
    n = spec.n_frames
    walk = np.cumsum(rng.normal(0.0, 1.0, (n, 2)), axis=0)
    walk -= walk[0]
    peak = np.abs(walk).max()
    if spec.drift_px == 0 or peak == 0:
        return np.zeros((n, 2))
    return walk * (spec.drift_px / peak)


def _exposures(spec: SimulationSpec) -> NDArray[np.float64]:
    e = np.full(spec.n_frames, spec.exposure_s)
    if spec.exposure_change is not None:
        k, e2 = spec.exposure_change
        e[max(k, 0) :] = e2
    return e


# ---------------------------------------------------------------------- scene pieces


def _hot_pixels(spec: SimulationSpec) -> tuple[tuple[int, int, float], ...]:
    rng = np.random.default_rng([spec.seed, _STREAM_SENSOR])
    h, w = spec.size
    n = min(spec.n_hot_pixels, h * w)
    flat = rng.choice(h * w, size=n, replace=False)
    lo, hi = spec.hot_level_fs
    levels = rng.uniform(lo, hi, n)
    return tuple((int(i % w), int(i // w), float(v)) for i, v in zip(flat, levels))


def _ambient(spec: SimulationSpec) -> NDArray[np.float32]:
    """Smooth ambient leak (H, W, 3): a broad glow from a corner plus a gentle ramp."""
    h, w = spec.size
    out = np.zeros((h, w, 3), np.float32)
    if spec.ambient_fs == 0:
        return out
    rng = np.random.default_rng([spec.seed, _STREAM_SENSOR, 1])
    cx = rng.choice([-0.15, 1.15]) * (w - 1)
    cy = rng.choice([-0.15, 1.15]) * (h - 1)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    diag = math.hypot(h, w)
    glow = np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / np.float32(2 * (0.45 * diag) ** 2))
    ramp = (xx / max(w - 1, 1)) if cx > 0 else (1.0 - xx / max(w - 1, 1))
    amb = 0.75 * glow + 0.25 * ramp
    amb *= np.float32(spec.ambient_fs / max(float(amb.max()), 1e-12))
    for c in range(3):
        out[..., c] = amb * np.float32(spec.ambient_rgb[c])
    return out


@dataclass(frozen=True)
class _Plan:
    """Everything decided before rendering (deterministic from the spec)."""

    times: NDArray[np.float64]
    exposures: NDArray[np.float64]
    drift: NDArray[np.float64]
    xs: NDArray[np.float64]
    ys: NDArray[np.float64]
    amplitudes: NDArray[np.float64]
    # (n_frames, n_spots): per-pixel value at the spot centre, red, FS per frame.
    centre_values: NDArray[np.float64]
    hot: tuple[tuple[int, int, float], ...]
    background: NDArray[np.float32]  # (H, W, 3) card + ambient, FS per frame at exposure_s


def _plan(spec: SimulationSpec, *, dark: bool = False) -> _Plan:
    rng = np.random.default_rng([spec.seed, _STREAM_TIMING])
    times = _frame_times(spec, rng)
    drift = _drift(spec, rng)
    exposures = _exposures(spec)
    xs, ys = spec.spot_centres()
    amp = spec.spot_amplitudes()
    values = np.zeros((spec.n_frames, spec.n_spots))
    for k in range(spec.n_spots):
        kw = {n: spec._per_spot(n, k) for n in ("onset_s", "rise_s", "decay_s")}
        big = ecl_pulse_antiderivative(
            np.stack([times - exposures / 2, times + exposures / 2]), **kw
        )
        values[:, k] = amp[k] / spec.exposure_s * (big[1] - big[0])
    h, w = spec.size
    if dark:
        background = np.zeros((h, w, 3), np.float32)
        values[:] = 0.0
    else:
        background = _ambient(spec)
        background += np.asarray(spec.background_rgb, np.float32)
    return _Plan(times, exposures, drift, xs, ys, amp, values, _hot_pixels(spec), background)


def _spot_cutout(
    x: float, y: float, *, radius_px: float, edge_px: float, flux: float
) -> tuple[slice, slice, NDArray[np.float32]]:
    """Profile weights in the spot's bounding box, scaled so they sum to ``flux``."""
    half = _spot_half_box(radius_px, edge_px)
    c0, r0 = round(x) - half, round(y) - half
    cc = np.arange(c0, c0 + 2 * half + 1, dtype=np.float64) - x
    rr = np.arange(r0, r0 + 2 * half + 1, dtype=np.float64) - y
    rho = np.hypot(rr[:, None], cc[None, :])
    wgt = spot_profile(rho, radius_px=radius_px, edge_px=edge_px)
    wgt *= flux / wgt.sum()  # pixel sampling error (< 1e-3) removed: the sum is exact
    return slice(r0, r0 + 2 * half + 1), slice(c0, c0 + 2 * half + 1), wgt.astype(np.float32)


def render_linear_frames(
    spec: SimulationSpec, *, dark: bool = False, n_frames: int | None = None
) -> Iterator[NDArray[np.float32]]:
    """Yield the frames of a recording as linear sensor values before encoding.

    Parameters
    ----------
    spec : SimulationSpec
    dark : bool
        No light at all (dark frames): only dark level, read noise and hot pixels.
    n_frames : int, optional
        Override ``spec.n_frames`` (used for dark series).

    Yields
    ------
    (H, W, 3) ndarray of float32
        Linear values in FS, clipped to [0, 1], one per frame, in order.
    """
    if n_frames is not None:
        spec = replace(spec, n_frames=int(n_frames))
    plan = _plan(spec, dark=dark)
    rng = np.random.default_rng([spec.seed, _STREAM_DARK if dark else _STREAM_NOISE])
    h, w = spec.size
    emitter = np.asarray(spec.emitter_rgb, np.float32)
    flux = spot_flux_px(spec.radius_px, spec.edge_px)
    hot_r = np.array([p[1] for p in plan.hot], dtype=np.intp)
    hot_c = np.array([p[0] for p in plan.hot], dtype=np.intp)
    hot_v = np.array([p[2] for p in plan.hot], dtype=np.float32)
    for i in range(spec.n_frames):
        scale = np.float32(plan.exposures[i] / spec.exposure_s)
        scene = plan.background * scale if not dark else plan.background.copy()
        dx, dy = plan.drift[i]
        for k in range(spec.n_spots):
            v = plan.centre_values[i, k]
            if v <= 0.0:
                continue
            rs, cs, wgt = _spot_cutout(
                plan.xs[k] + dx,
                plan.ys[k] + dy,
                radius_px=spec.radius_px,
                edge_px=spec.edge_px,
                flux=flux,
            )
            scene[rs, cs, :] += (np.float32(v) * wgt)[:, :, None] * emitter
        if dark:
            signal = np.zeros((h, w, 3), np.float32)
            noise_var: NDArray[np.float32] | float = np.float32(spec.read_noise_fs**2)
        elif spec.shot_noise == "poisson":
            signal = (
                rng.poisson(scene * np.float64(spec.gain_e_per_fs)) / spec.gain_e_per_fs
            ).astype(np.float32)
            noise_var = np.float32(spec.read_noise_fs**2)
        else:  # "gaussian": shot and read noise in one normal draw of the same variance
            signal = scene
            noise_var = scene * np.float32(1.0 / spec.gain_e_per_fs) + np.float32(
                spec.read_noise_fs**2
            )
        if spec.read_noise_fs > 0 or (not dark and spec.shot_noise == "gaussian"):
            signal += rng.standard_normal(signal.shape, dtype=np.float32) * np.sqrt(noise_var)
        signal += np.float32(spec.dark_level_fs)
        if hot_v.size:
            signal[hot_r, hot_c, :] += hot_v[:, None]
        np.clip(signal, 0.0, 1.0, out=signal)
        yield signal


# --------------------------------------------------------------------------- encoding


def _encode_srgb8(linear: NDArray[np.float32]) -> NDArray[np.uint8]:
    v = srgb_encode(linear)
    return np.clip(np.rint(v * 255.0), 0, 255).astype(np.uint8)


def _encode_linear16(linear: NDArray[np.float32]) -> NDArray[np.uint16]:
    return np.clip(np.rint(linear * 65535.0), 0, 65535).astype(np.uint16)


def _ycbcr709_limited(
    linear: NDArray[np.float32],
) -> tuple[NDArray[np.uint8], NDArray[np.uint8], NDArray[np.uint8]]:
    """Linear RGB -> BT.709 OETF -> Y'CbCr (BT.709 matrix) -> 8-bit limited range, 4:2:0.

    Chroma is the mean of each 2x2 block of the full-resolution Cb, Cr (centre-sited).
    """
    rgb = bt709_encode(linear)
    r, g, b = rgb[..., 0], rgb[..., 1], rgb[..., 2]
    y = _KR * r + _KG * g + _KB * b
    cb = (b - y) / (2.0 * (1.0 - _KB))
    cr = (r - y) / (2.0 * (1.0 - _KR))
    h, w = y.shape

    def sub(c: NDArray[np.float32]) -> NDArray[np.float32]:
        return c.reshape(h // 2, 2, w // 2, 2).mean(axis=(1, 3))

    y8 = np.clip(np.rint(16.0 + 219.0 * y), 0, 255).astype(np.uint8)
    cb8 = np.clip(np.rint(128.0 + 224.0 * sub(cb)), 0, 255).astype(np.uint8)
    cr8 = np.clip(np.rint(128.0 + 224.0 * sub(cr)), 0, 255).astype(np.uint8)
    return y8, cb8, cr8


def _exif_bytes(spec: SimulationSpec, when: _dt.datetime, exposure_s: float) -> bytes:
    from PIL import ExifTags, Image, TiffImagePlugin

    exif = Image.Exif()
    stamp = when.strftime("%Y:%m:%d %H:%M:%S")
    exif[_TAG_MAKE] = _CAMERA_MAKE
    exif[_TAG_MODEL] = _CAMERA_MODEL
    exif[_TAG_ORIENTATION] = 1
    exif[_TAG_DATETIME] = stamp
    sub = exif.get_ifd(ExifTags.IFD.Exif)
    frac = Fraction(exposure_s).limit_denominator(1_000_000)
    sub[_TAG_EXPOSURE] = TiffImagePlugin.IFDRational(frac.numerator, frac.denominator)
    sub[_TAG_ISO] = int(spec.iso)
    sub[_TAG_DT_ORIGINAL] = stamp
    sub[_TAG_SUBSEC_ORIGINAL] = f"{when.microsecond // 1000:03d}"
    return exif.tobytes()


# TIFF 6.0 field types.
_T_ASCII, _T_SHORT, _T_LONG, _T_RATIONAL = 2, 3, 4, 5


def _tiff_ifd(entries: list[tuple[int, int, int, bytes]], start: int) -> bytes:
    """One little-endian IFD at file offset ``start``: entries sorted by tag, values
    longer than 4 bytes stored right after the IFD (word aligned), next-IFD offset 0."""
    entries = sorted(entries)
    data_at = start + 2 + 12 * len(entries) + 4
    head, extra = [struct.pack("<H", len(entries))], b""
    for tag, typ, count, value in entries:
        if len(value) <= 4:
            head.append(struct.pack("<HHI", tag, typ, count) + value.ljust(4, b"\0"))
        else:
            head.append(struct.pack("<HHII", tag, typ, count, data_at + len(extra)))
            extra += value + (b"\0" if len(value) % 2 else b"")
    head.append(struct.pack("<I", 0))
    return b"".join(head) + extra


def _ascii(text: str) -> tuple[int, bytes]:
    raw = text.encode("ascii") + b"\0"
    return len(raw), raw


def _tiff16_bytes(
    rgb: NDArray[np.uint16], spec: SimulationSpec, when: _dt.datetime, exposure_s: float
) -> bytes:
    """A baseline TIFF 6.0 file: 16-bit RGB, one uncompressed strip, with an Exif IFD
    (ExposureTime, ISOSpeedRatings, DateTimeOriginal, SubSecTimeOriginal)."""
    h, w, _ = rgb.shape
    pixels = np.ascontiguousarray(rgb, dtype="<u2").tobytes()
    stamp = when.strftime("%Y:%m:%d %H:%M:%S")
    frac = Fraction(exposure_s).limit_denominator(1_000_000)

    def ifd0(exif_at: int, strip_at: int) -> list[tuple[int, int, int, bytes]]:
        short = lambda v: struct.pack("<H", v)
        long_ = lambda v: struct.pack("<I", v)
        return [
            (256, _T_LONG, 1, long_(w)),
            (257, _T_LONG, 1, long_(h)),
            (258, _T_SHORT, 3, struct.pack("<3H", 16, 16, 16)),
            (259, _T_SHORT, 1, short(1)),  # no compression
            (262, _T_SHORT, 1, short(2)),  # RGB
            (_TAG_MAKE, _T_ASCII, *_ascii(_CAMERA_MAKE)),
            (_TAG_MODEL, _T_ASCII, *_ascii(_CAMERA_MODEL)),
            (273, _T_LONG, 1, long_(strip_at)),
            (_TAG_ORIENTATION, _T_SHORT, 1, short(1)),
            (277, _T_SHORT, 1, short(3)),
            (278, _T_LONG, 1, long_(h)),
            (279, _T_LONG, 1, long_(len(pixels))),
            (282, _T_RATIONAL, 1, struct.pack("<2I", 72, 1)),
            (283, _T_RATIONAL, 1, struct.pack("<2I", 72, 1)),
            (284, _T_SHORT, 1, short(1)),  # chunky
            (296, _T_SHORT, 1, short(2)),  # inch
            (_TAG_DATETIME, _T_ASCII, *_ascii(stamp)),
            (_EXIF_IFD, _T_LONG, 1, long_(exif_at)),
        ]

    exif_entries = [
        (_TAG_EXPOSURE, _T_RATIONAL, 1, struct.pack("<2I", frac.numerator, frac.denominator)),
        (_TAG_ISO, _T_SHORT, 1, struct.pack("<H", min(int(spec.iso), 65535))),
        (_TAG_DT_ORIGINAL, _T_ASCII, *_ascii(stamp)),
        (_TAG_SUBSEC_ORIGINAL, _T_ASCII, *_ascii(f"{when.microsecond // 1000:03d}")),
    ]
    size0 = len(_tiff_ifd(ifd0(0, 0), 8))
    exif_at = 8 + size0 + (size0 % 2)
    exif_block = _tiff_ifd(exif_entries, exif_at)
    strip_at = exif_at + len(exif_block)
    strip_at += strip_at % 2
    block0 = _tiff_ifd(ifd0(exif_at, strip_at), 8)
    out = bytearray(b"II*\0" + struct.pack("<I", 8))
    out += block0
    out += b"\0" * (exif_at - len(out))
    out += exif_block
    out += b"\0" * (strip_at - len(out))
    out += pixels
    return bytes(out)


def _prepare_output(out_path: Path, *, folder: bool, overwrite: bool) -> None:
    if folder:
        if out_path.exists() and not out_path.is_dir():
            raise OutputError(
                "exists and is not a folder; choose another output path", path=out_path
            )
        if out_path.is_dir() and any(out_path.iterdir()) and not overwrite:
            raise OutputError(
                "folder is not empty; pass overwrite=True or choose another", path=out_path
            )
        ensure_dir(out_path)
    else:
        if out_path.exists() and not overwrite:
            raise OutputError("file exists; pass overwrite=True or choose another", path=out_path)
        ensure_dir(out_path.parent)


def _write_stills(
    out_dir: Path,
    spec: SimulationSpec,
    frames: Iterator[NDArray[np.float32]],
    times: NDArray[np.float64],
    exposures: NDArray[np.float64],
    prefix: str,
) -> tuple[list[str], dict[str, Any]]:
    from PIL import Image

    start = _dt.datetime.fromisoformat(spec.start_time)
    files: list[str] = []
    ext = {"jpeg": "jpg", "png": "png", "tiff16": "tif"}[spec.encoding]
    for i, lin in enumerate(frames):
        path = out_dir / f"{prefix}_{i:05d}.{ext}"
        when = start + _dt.timedelta(milliseconds=round(times[i] * 1000.0))
        if spec.encoding == "tiff16":
            data = _tiff16_bytes(_encode_linear16(lin), spec, when, float(exposures[i]))
            with atomic_write(path, "wb") as fh:
                fh.write(data)
        else:
            exif = _exif_bytes(spec, when, float(exposures[i]))
            im = Image.fromarray(_encode_srgb8(lin), mode="RGB")
            with atomic_write(path, "wb") as fh:
                if spec.encoding == "jpeg":
                    im.save(
                        fh,
                        format="JPEG",
                        quality=spec.jpeg_quality,
                        subsampling=_JPEG_SUBSAMPLING[spec.jpeg_subsampling],
                        exif=exif,
                    )
                else:
                    im.save(fh, format="PNG", compress_level=1, exif=exif)
        files.append(str(path))
    timing = "exif DateTimeOriginal + SubSecTimeOriginal (ms)"
    if spec.encoding == "tiff16":
        enc: dict[str, Any] = {
            "kind": "tiff16",
            "transfer": "linear",
            "bit_depth": 16,
            "container": "tiff (baseline RGB, uncompressed)",
            "metadata": "exif",
            "timing": timing,
        }
    else:
        enc = {
            "kind": spec.encoding,
            "transfer": "srgb",
            "bit_depth": 8,
            "metadata": "exif",
            "timing": timing,
        }
        if spec.encoding == "jpeg":
            enc.update(quality=spec.jpeg_quality, subsampling=spec.jpeg_subsampling)
    return files, enc


def _write_video(
    path: Path,
    spec: SimulationSpec,
    frames: Iterator[NDArray[np.float32]],
    times: NDArray[np.float64],
) -> dict[str, Any]:
    import av

    h, w = spec.size
    ticks = np.rint(times * _VIDEO_TIME_BASE.denominator).astype(np.int64)
    with atomic_write(path, "wb") as fh:
        container = av.open(fh, mode="w", format="mp4")
        try:
            stream = container.add_stream(
                "libx264", rate=Fraction(spec.fps).limit_denominator(1001)
            )
            stream.width, stream.height = w, h
            stream.pix_fmt = "yuv420p"
            stream.time_base = _VIDEO_TIME_BASE
            cc = stream.codec_context
            cc.time_base = _VIDEO_TIME_BASE  # else pts are rescaled to 1/fps (VFR collides)
            cc.colorspace = _AV_BT709
            cc.color_primaries = _AV_BT709
            cc.color_trc = _AV_BT709
            cc.color_range = _AV_RANGE_MPEG
            opts = {"preset": spec.video_preset}
            if spec.gop_frames is not None:
                opts["g"] = str(int(spec.gop_frames))
            if spec.bitrate is not None:
                stream.bit_rate = int(spec.bitrate)
            else:
                opts["crf"] = str(int(spec.crf))  # type: ignore[arg-type]
            stream.options = opts
            for i, lin in enumerate(frames):
                planes = _ycbcr709_limited(lin)
                frame = av.VideoFrame(w, h, "yuv420p")
                for plane, data in zip(frame.planes, planes):
                    buf = np.zeros((plane.height, plane.line_size), np.uint8)
                    buf[:, : plane.width] = data
                    plane.update(buf.tobytes())
                frame.colorspace = _AV_BT709
                frame.color_range = _AV_RANGE_MPEG
                frame.pts = int(ticks[i])
                frame.time_base = _VIDEO_TIME_BASE
                for packet in stream.encode(frame):
                    container.mux(packet)
            for packet in stream.encode(None):
                container.mux(packet)
        finally:
            container.close()
    enc: dict[str, Any] = {
        "kind": "h264",
        "transfer": "bt709",
        "bit_depth": 8,
        "container": "mp4",
        "codec": "libx264",
        "pix_fmt": "yuv420p",
        "yuv_matrix": "bt709",
        "yuv_range": "limited",
        "color_primaries": "bt709",
        "color_trc": "bt709",
        "chroma_siting": "centre (2x2 mean)",
        "time_base": "1/600",
        "vfr": bool(spec.vfr),
        "preset": spec.video_preset,
        "gop_frames": spec.gop_frames,
        "metadata": "none",
        "timing": "pts",
    }
    if spec.bitrate is not None:
        enc["bitrate"] = int(spec.bitrate)
    else:
        enc["crf"] = int(spec.crf)  # type: ignore[arg-type]
    return enc


# ------------------------------------------------------------------------ public API


def _spot_truths(spec: SimulationSpec, plan: _Plan) -> tuple[SpotTruth, ...]:
    flux = spot_flux_px(spec.radius_px, spec.edge_px)
    frac = spot_flux_within(spec.radius_px, radius_px=spec.radius_px, edge_px=spec.edge_px) / flux
    t_first, t_last = float(plan.times[0]), float(plan.times[-1])
    out = []
    for k in range(spec.n_spots):
        kw = {n: spec._per_spot(n, k) for n in ("onset_s", "rise_s", "decay_s")}
        peak_rate = float(plan.amplitudes[k] / spec.exposure_s)
        big = ecl_pulse_antiderivative(np.array([t_first, t_last, np.inf]), **kw)
        cx, cy = round(plan.xs[k]), round(plan.ys[k])
        bg = plan.background[cy, cx, :].astype(np.float64)
        # Noiseless centre value per frame and channel (background scales with exposure).
        scale = plan.exposures / spec.exposure_s
        centre = (
            bg[None, :] * scale[:, None]
            + plan.centre_values[:, k, None] * np.asarray(spec.emitter_rgb)[None, :]
            + spec.dark_level_fs
        )
        sat_frames = tuple(int(i) for i in np.flatnonzero((centre >= 1.0).any(axis=1)))
        integral = peak_rate * flux * float(big[1] - big[0])
        out.append(
            SpotTruth(
                number=k + 1,
                row=k // spec.n_cols,
                col=k % spec.n_cols,
                x_px=float(plan.xs[k]),
                y_px=float(plan.ys[k]),
                radius_px=float(spec.radius_px),
                edge_px=float(spec.edge_px),
                amplitude_fs=float(plan.amplitudes[k]),
                peak_rate_fs_per_s=peak_rate,
                onset_s=kw["onset_s"],
                rise_s=kw["rise_s"],
                decay_s=kw["decay_s"],
                peak_time_s=kw["onset_s"] + ecl_pulse_peak_delay(kw["rise_s"], kw["decay_s"]),
                flux_px=flux,
                in_disk_fraction=frac,
                peak_signal=peak_rate * flux,
                integral=integral,
                integral_full=peak_rate * flux * float(big[2]),
                integral_in_disk=integral * frac,
                channel_factors=tuple(float(c) for c in spec.emitter_rgb),  # type: ignore[arg-type]
                background_fs=tuple(float(b) for b in bg),  # type: ignore[arg-type]
                saturated=bool(sat_frames),
                saturated_frames=sat_frames,
            )
        )
    return tuple(out)


def simulate_recording(
    out_path: str | Path,
    spec: SimulationSpec | None = None,
    *,
    overwrite: bool = False,
    write_truth_json: bool = False,
) -> RecordingTruth:
    """Render and write a simulated ECL recording; return its ground truth.

    Parameters
    ----------
    out_path : str or Path
        A folder for stills (``frame_00000.jpg`` ...), or the ``.mp4`` file for H.264.
    spec : SimulationSpec, optional
        All options (default: ``SimulationSpec()``).
    overwrite : bool
        Allow writing into a non-empty folder or over an existing file.
    write_truth_json : bool
        Also write the truth beside the recording (see :func:`truth_path`).

    Returns
    -------
    RecordingTruth

    Raises
    ------
    InputFormatError, SpotError
        Invalid options (raised when the spec is built).
    OutputError
        The output exists (without ``overwrite``) or cannot be written.

    Examples
    --------
    >>> truth = simulate_recording(tmp / "card", SimulationSpec(encoding="png"))  # doctest: +SKIP
    >>> truth.spots[0].integral  # doctest: +SKIP
    """
    spec = SimulationSpec() if spec is None else spec
    return _simulate(
        Path(out_path), spec, dark=False, overwrite=overwrite, write_truth_json=write_truth_json
    )


def simulate_darks(
    out_path: str | Path,
    spec: SimulationSpec | None = None,
    n_frames: int = 16,
    *,
    overwrite: bool = False,
    write_truth_json: bool = False,
) -> RecordingTruth:
    """Write dark frames of the same simulated sensor: no light, same exposure and encoding.

    Dark level, read noise and hot pixels (same coordinates as the recording made with
    the same spec and seed) are present; the noise is an independent draw.

    Parameters
    ----------
    out_path : str or Path
        Folder (stills) or ``.mp4`` file (H.264).
    spec : SimulationSpec, optional
        The recording's spec (spots, pulse and light settings are ignored).
    n_frames : int
        Number of dark frames.
    overwrite, write_truth_json : bool
        As in :func:`simulate_recording`.

    Returns
    -------
    RecordingTruth
        With ``is_dark=True`` and no spots.
    """
    spec = SimulationSpec() if spec is None else spec
    spec = replace(spec, n_frames=int(n_frames), vfr=False)
    return _simulate(
        Path(out_path), spec, dark=True, overwrite=overwrite, write_truth_json=write_truth_json
    )


def _simulate(
    out_path: Path, spec: SimulationSpec, *, dark: bool, overwrite: bool, write_truth_json: bool
) -> RecordingTruth:
    plan = _plan(spec, dark=dark)
    frames = render_linear_frames(spec, dark=dark)
    video = spec.encoding == "h264"
    _prepare_output(out_path, folder=not video, overwrite=overwrite)
    if video:
        encoding = _write_video(out_path, spec, frames, plan.times)
        files = [str(out_path)]
    else:
        files, encoding = _write_stills(
            out_path, spec, frames, plan.times, plan.exposures, "dark" if dark else "frame"
        )
    spots = () if dark else _spot_truths(spec, plan)
    truth = RecordingTruth(
        path=str(out_path),
        files=tuple(files),
        encoding=encoding,
        frame_times_s=tuple(float(t) for t in plan.times),
        frame_exposure_s=tuple(float(e) for e in plan.exposures),
        exposure_s=float(spec.exposure_s),
        iso=int(spec.iso),
        size=spec.size,
        spots=spots,
        hot_pixels=plan.hot,
        dark_level_fs=float(spec.dark_level_fs),
        read_noise_fs=float(spec.read_noise_fs),
        gain_e_per_fs=float(spec.gain_e_per_fs),
        drift_px=tuple(
            (float(a), float(b)) for a, b in (np.zeros_like(plan.drift) if dark else plan.drift)
        ),
        saturated_spots=tuple(s.number for s in spots if s.saturated),
        spec=spec.to_dict(),
        is_dark=dark,
    )
    if write_truth_json:
        write_truth(truth)
    return truth


def truth_path(out_path: str | Path) -> Path:
    """Where the ground truth of a recording goes: ``card/`` -> ``card.truth.json``,
    ``run.mp4`` -> ``run.truth.json`` (beside, not inside, the recording)."""
    p = Path(out_path)
    if p.suffix and not p.is_dir():
        return p.with_suffix(".truth.json")
    return p.parent / f"{p.name}.truth.json"


def write_truth(truth: RecordingTruth, path: str | Path | None = None) -> Path:
    """Write the truth as JSON (atomically); default path from :func:`truth_path`."""
    dest = truth_path(truth.path) if path is None else Path(path)
    write_json_atomic(dest, truth.to_dict())
    return dest


def load_truth(path: str | Path) -> RecordingTruth:
    """Read a truth JSON written by :func:`write_truth`."""
    import json

    p = Path(path)
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        raise InputFormatError(f"cannot read ground truth ({err})", path=p) from err
    try:
        return RecordingTruth.from_dict(data)
    except InputFormatError as err:
        raise InputFormatError(err.reason, path=p) from err
