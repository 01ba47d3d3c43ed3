"""Camera characterisation: EMVA 1288 photon transfer, linearity error, response curves.

Two jobs, both run before a camera is trusted for quantitative work:

1. **Photon transfer** (EMVA 1288 Release 4.0 Linear). From flat-field image pairs at
   stepped exposure (or light level) and dark pairs at the same settings: mean grey value
   and temporal variance per level (Eqs. 16, 18), the system gain K (Eq. 50, a straight
   line with unknown offset over 0-70 % of saturation), temporal dark noise (Eqs. 53-54),
   saturation (R4 rule: 0.1-0.2 % of pixels at the maximum code; the R3.1 variance-maximum
   rule is reported beside it), the linearity error LE (Eqs. 58-63), PTC linearity
   (Eq. 51), SNR (Eq. 20), responsivity (Eq. 49), the absolute sensitivity threshold
   (Eqs. 26-27), dynamic range (Eq. 28), DSNU and PRNU (Eqs. 66-67).
2. **Response curves** for gamma-encoded devices (phones, 8-bit stills): Debevec-Malik
   recovery of the inverse camera response from an exposure bracket with OpenCV, saved as
   a device profile that ``--transfer profile=FILE`` reads.

Folder convention for photon transfer
-------------------------------------
A folder holding ``levels.csv`` (a manifest) with one row per image file::

    file,role,exposure_s,level,photons
    flat_00_a.tif,flat,0.001,,
    flat_00_b.tif,flat,0.001,,
    dark_00_a.tif,dark,0.001,,
    dark_00_b.tif,dark,0.001,,

``file`` is relative to the manifest's folder; ``role`` is ``flat`` or ``dark``;
``exposure_s`` is the exposure time in seconds; ``level`` (optional, default 1) is the
relative light level when the light, not the exposure, is stepped; ``photons`` (optional)
is the mean number of photons per pixel mu_p at that level (EMVA 1288 Eq. 4), which
enables responsivity in DN/photon and quantum efficiency. Rows sharing (role,
exposure_s, level) form one group; each flat group needs at least two images (the first
two in manifest order form the pair) and a dark group at the same exposure time (or a
single dark group, used for every level). A group with at least ``min_stack_frames``
images is also used as a stack for DSNU/PRNU.

Without ``levels.csv``, every image in the folder is grouped by its EXIF ExposureTime
and the dark frames come from a second folder (``dark=``), grouped the same way.

Units: grey values in DN (digital numbers, the stored codes), variances in DN^2, charge in
electrons (e-), exposure time in seconds.

Device profile normalisation
----------------------------
``response[c][code]`` is relative linear light with **full scale 1.0 at the light level
where the channel clips** (the 254/255 transition, found from the bracket's clipped
pixels; see :func:`recover_response`). Code 255 maps to 1.0 and code 0 to 0.0, so a
profile-linearised value is in the same linear full-scale units as ``--transfer srgb``.
OpenCV's own normalisation (resp[128] about 1) is kept as ``opencv_response``.

References
----------
EMVA Standard 1288, Release 4.0 Linear, Release Candidate (2021-03-15), European Machine
Vision Association: sections 2, 4, 6.5-6.9, 8.
P. E. Debevec and J. Malik, "Recovering high dynamic range radiance maps from
photographs", SIGGRAPH 1997.
M. A. Robertson, S. Borman, R. L. Stevenson, "Estimation-theoretic approach to dynamic
range enhancement using multiple exposures", J. Electronic Imaging 12 (2003).
"""

from __future__ import annotations

import csv
import datetime as _dt
import json
import math
import warnings
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import asdict, dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from . import __version__
from ._io import atomic_write, ensure_dir, write_json_atomic
from .errors import EclQuantError, EclQuantWarning, InputFormatError, ShapeMismatchError

__all__ = [
    "QUANTIZATION_VARIANCE_DN2",
    "PairStatistics",
    "pair_statistics",
    "StackStatistics",
    "stack_statistics",
    "highpass_1288",
    "LinearityError",
    "linearity_error",
    "SaturationPoint",
    "find_saturation",
    "variance_model",
    "snr_model",
    "sensitivity_threshold",
    "dark_noise_electrons",
    "LevelMeasurement",
    "Nonuniformity",
    "nonuniformity",
    "PhotonTransferSettings",
    "PhotonTransferResult",
    "analyse_photon_transfer",
    "photon_transfer",
    "LevelGroup",
    "discover_levels",
    "measure_photon_transfer",
    "write_camera_outputs",
    "ResponseCurve",
    "recover_response",
    "DeviceProfile",
    "make_profile",
    "save_profile",
    "load_profile",
    "read_bracket",
    "profile_from_bracket",
    "CameraWarning",
    "MANIFEST_NAME",
    "PROFILE_SCHEMA_ID",
]

#: Variance of uniform quantisation noise, sigma_q^2 = 1/12 DN^2 (EMVA 1288 Eq. 14).
QUANTIZATION_VARIANCE_DN2 = 1.0 / 12.0
#: Name of the photon-transfer manifest looked for in a folder.
MANIFEST_NAME = "levels.csv"
#: ``schema`` field of a device profile.
PROFILE_SCHEMA_ID = "ecl_quant.device_profile"
PROFILE_VERSION = 1
PROFILE_CHANNELS = ("red", "green", "blue", "luma")
# EMVA 1288 Eq. 54: below this dark variance only an upper limit of the dark noise exists.
_DARK_VAR_FLOOR_DN2 = 0.24
# Rec. 709 luma weights (ITU-R BT.709-6 item 3.2), the weights radiometry uses for the
# "luma" channel of R'G'B' stills, so the luma curve applies to the same quantity.
_LUMA_WEIGHTS = np.array([0.2126, 0.7152, 0.0722])


class CameraWarning(EclQuantWarning):
    """Camera characterisation ran, but a condition of the standard is not met."""


def _float_image(a: ArrayLike) -> NDArray[np.float64]:
    # Statistics over a whole frame need float64 sums (float32 loses the variance of a
    # difference of two large means); only the analysed crop is converted.
    return np.asarray(a, dtype=np.float64)


# ============================================================ two-image statistics
@dataclass(frozen=True)
class PairStatistics:
    """Mean and variances from two images taken at the same settings.

    Attributes
    ----------
    mean_dn : float
        mu_y = (mu[0] + mu[1]) / 2 (EMVA 1288 Eq. 16), DN.
    mean_a_dn, mean_b_dn : float
        Spatial means of the two images, DN.
    temporal_variance_dn2 : float
        sigma_y^2 from the difference image with the mean-difference correction (Eq. 18), DN^2.
    spatial_variance_dn2 : float
        s_y^2 = (1/NM) sum (y0 - mu0)(y1 - mu1) (Eq. 32), DN^2: the pixel-to-pixel variance
        with the temporal noise cancelled in expectation.
    n_pixels : int
        N * M.
    saturated_fraction : float
        Fraction of the 2NM pixel values at or above ``max_code`` (0 when no max given).
    max_code : float or None
    observed_max_dn : float or None
        Largest value in the pair.
    observed_max_fraction : float
        Fraction of the 2NM values equal to ``observed_max_dn`` (a large fraction below
        ``max_code`` hints at a lower sensor maximum, e.g. 12-bit data in 16-bit files).
    """

    mean_dn: float
    mean_a_dn: float
    mean_b_dn: float
    temporal_variance_dn2: float
    spatial_variance_dn2: float
    n_pixels: int
    saturated_fraction: float
    max_code: float | None
    observed_max_dn: float | None = None
    observed_max_fraction: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready)."""
        return asdict(self)


def pair_statistics(image_a: ArrayLike, image_b: ArrayLike, *,
                    max_code: float | None = None) -> PairStatistics:
    """EMVA 1288 mean and temporal variance of an image pair (Eqs. 16, 18, 32).

    Parameters
    ----------
    image_a, image_b : (H, W) or (n,) array_like
        Two images at identical settings (codes, DN). Neither is modified.
    max_code : float, optional
        Maximum code of the sensor (2**k - 1 or lower); values at or above it count as
        saturated.

    Returns
    -------
    PairStatistics

    Raises
    ------
    ShapeMismatchError
        If the two images differ in shape.
    InputFormatError
        If the images have fewer than two pixels.
    """
    a = np.asarray(image_a)
    b = np.asarray(image_b)
    if a.shape != b.shape:
        raise ShapeMismatchError(
            f"the two images of a pair differ in size ({_shape_text(a.shape)} vs "
            f"{_shape_text(b.shape)}); both images of a level must come from the same setting"
        )
    if a.size < 2:
        raise InputFormatError("an image of the pair has fewer than two pixels")
    # Two passes over blocks of about 1 Mpixel converted to float64 one at a time, so a
    # full phone frame never exists in float64 (float32 would lose the variance of the
    # difference of two large means).
    fa = a.reshape(-1)
    fb = b.reshape(-1)
    n = fa.size
    step = 1 << 20
    blocks = [slice(i, min(i + step, n)) for i in range(0, n, step)]
    sum_a = sum_b = 0.0
    for sl in blocks:
        sum_a += float(np.sum(fa[sl], dtype=np.float64))
        sum_b += float(np.sum(fb[sl], dtype=np.float64))
    mu_a, mu_b = sum_a / n, sum_b / n
    sum_dd = sum_cov = 0.0
    for sl in blocks:
        xa = fa[sl].astype(np.float64) - mu_a
        xb = fb[sl].astype(np.float64) - mu_b
        d = xa - xb  # (a - b) minus its mean: the Eq. 18 correction term done exactly
        sum_dd += float(np.dot(d, d))
        sum_cov += float(np.dot(xa, xb))
    temporal = sum_dd / (2.0 * n)  # = (1/2NM) sum (a-b)^2 - (mu_a - mu_b)^2 / 2 (Eq. 18)
    spatial = sum_cov / n  # Eq. 32
    if max_code is None:
        sat = 0.0
    else:
        sat = float((np.count_nonzero(a >= max_code) + np.count_nonzero(b >= max_code)) / (2 * n))
    top = max(a.max(), b.max())
    top_frac = float((np.count_nonzero(a == top) + np.count_nonzero(b == top)) / (2 * n))
    return PairStatistics(
        mean_dn=0.5 * (mu_a + mu_b), mean_a_dn=mu_a, mean_b_dn=mu_b,
        temporal_variance_dn2=temporal, spatial_variance_dn2=spatial, n_pixels=int(n),
        saturated_fraction=sat, max_code=None if max_code is None else float(max_code),
        observed_max_dn=float(top), observed_max_fraction=top_frac,
    )


def _shape_text(shape: tuple[int, ...]) -> str:
    if len(shape) >= 2:
        return f"{shape[1]}x{shape[0]}"
    return "x".join(str(s) for s in shape)


# ============================================================ stacks (nonuniformity)
def _highpass_kernel_1d() -> NDArray[np.float64]:
    box7 = np.full(7, 1.0 / 7.0)
    box11 = np.full(11, 1.0 / 11.0)
    binom3 = np.array([0.25, 0.5, 0.25])
    return np.convolve(np.convolve(box7, box11), binom3)  # 19 taps


#: Half width of the EMVA 1288 section 8.1 smoothing kernel (7x7 box, 11x11 box, 3x3 binomial).
HIGHPASS_HALF_WIDTH_PX = 9


def highpass_1288(image: ArrayLike) -> NDArray[np.float64]:
    """High-pass filter of EMVA 1288 section 8.1: image minus its smoothed version.

    The smoothing is a 7x7 box, then an 11x11 box, then a 3x3 binomial filter. The result
    is cropped by the kernel half width (9 px) on every side so that no edge handling
    enters the statistics (our choice; the standard leaves the border to the implementer).

    Parameters
    ----------
    image : (H, W) array_like
        Needs H, W > 18.

    Returns
    -------
    (H - 18, W - 18) ndarray of float64
    """
    img = _float_image(image)
    if img.ndim != 2 or min(img.shape) <= 2 * HIGHPASS_HALF_WIDTH_PX:
        raise InputFormatError("the high-pass filter needs a 2-D image larger than 18x18 pixels")
    from scipy.ndimage import convolve1d

    k = _highpass_kernel_1d()
    smooth = convolve1d(convolve1d(img, k, axis=0, mode="reflect"), k, axis=1, mode="reflect")
    h = HIGHPASS_HALF_WIDTH_PX
    return (img - smooth)[h:-h, h:-h]


def _highpass_noise_gain() -> float:
    """Sum of squared taps of (delta - smoothing): the filter's gain on white noise variance."""
    k = _highpass_kernel_1d()
    centre = k[len(k) // 2] ** 2
    return float(1.0 - 2.0 * centre + np.sum(k**2) ** 2)


@dataclass(frozen=True)
class StackStatistics:
    """Statistics of L images averaged at one setting (EMVA 1288 section 4.2).

    Attributes
    ----------
    mean_dn : float
        Mean of the averaged image <y>, DN.
    spatial_variance_dn2 : float
        s_y^2 = s_measured^2 - sigma_stack^2 / L (Eq. 36; with the high-pass filter, the
        correction is scaled by the filter's noise gain), DN^2.
    measured_variance_dn2 : float
        s_measured^2 of the averaged image (Eq. 35), DN^2.
    temporal_variance_dn2 : float
        sigma_stack^2, the mean over pixels of the per-pixel variance with 1/(L - 1) (Eq. 65).
    n_frames : int
        L.
    shape : (int, int)
        Size of the analysed image (cropped by 9 px per side after the high-pass filter).
    highpass : bool
    """

    mean_dn: float
    spatial_variance_dn2: float
    measured_variance_dn2: float
    temporal_variance_dn2: float
    n_frames: int
    shape: tuple[int, ...]
    highpass: bool

    def to_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready)."""
        d = asdict(self)
        d["shape"] = list(self.shape)
        return d


def stack_statistics(frames: Iterable[ArrayLike], *, highpass: bool = False) -> StackStatistics:
    """Average a stream of L images and estimate their spatial variance (Eqs. 33-36, 65).

    Memory holds two float64 images (running sums), whatever L is.

    Parameters
    ----------
    frames : iterable of (H, W) array_like
        At least two images at identical settings.
    highpass : bool
        Apply the section 8.1 high-pass filter to the averaged image first.

    Raises
    ------
    InputFormatError
        Fewer than two frames.
    ShapeMismatchError
        Frames of different sizes.
    """
    first: NDArray[np.float64] | None = None
    s1: NDArray[np.float64] | None = None
    s2: NDArray[np.float64] | None = None
    n = 0
    for fr in frames:
        y = _float_image(fr)
        if first is None:
            first = y.copy()
            s1 = np.zeros_like(y)
            s2 = np.zeros_like(y)
        elif y.shape != first.shape:
            raise ShapeMismatchError(
                f"stack frame {n} is {_shape_text(y.shape)} but the first is "
                f"{_shape_text(first.shape)}; record the stack at one resolution"
            )
        d = y - first  # shifted sums keep the variance exact in float64
        s1 += d  # type: ignore[operator]
        s2 += d * d  # type: ignore[operator]
        n += 1
    if n < 2 or first is None or s1 is None or s2 is None:
        raise InputFormatError(f"a stack needs at least two frames, got {n}")
    mean_img = first + s1 / n
    var_pix = np.maximum((s2 - s1 * s1 / n) / (n - 1), 0.0)
    sigma_stack = float(var_pix.mean())
    if highpass:
        hp = highpass_1288(mean_img)
        measured = float(np.mean((hp - hp.mean()) ** 2))
        correction = sigma_stack * _highpass_noise_gain() / n
        shape = hp.shape
    else:
        measured = float(np.mean((mean_img - mean_img.mean()) ** 2))
        correction = sigma_stack / n
        shape = mean_img.shape
    return StackStatistics(
        mean_dn=float(mean_img.mean()), spatial_variance_dn2=measured - correction,
        measured_variance_dn2=measured, temporal_variance_dn2=sigma_stack, n_frames=n,
        shape=tuple(int(v) for v in shape), highpass=highpass,
    )


# ============================================================ model equations
def variance_model(mean_above_dark_dn: ArrayLike, *, gain_dn_per_e: float,
                   dark_noise_e: float) -> NDArray[np.float64]:
    """Photon transfer, sigma_y^2 = K^2 sigma_d^2 + sigma_q^2 + K (mu_y - mu_y.dark), DN^2.

    EMVA 1288 Eq. 15.
    """
    k = gain_dn_per_e
    above = np.asarray(mean_above_dark_dn, dtype=np.float64)
    return k**2 * dark_noise_e**2 + QUANTIZATION_VARIANCE_DN2 + k * above


def snr_model(photons: ArrayLike, *, eta: float, gain_dn_per_e: float,
              dark_noise_e: float) -> NDArray[np.float64]:
    """SNR(mu_p) = eta mu_p / sqrt(sigma_d^2 + sigma_q^2/K^2 + eta mu_p) (EMVA 1288 Eq. 21)."""
    mu_e = eta * np.asarray(photons, dtype=np.float64)
    k = gain_dn_per_e
    return mu_e / np.sqrt(dark_noise_e**2 + QUANTIZATION_VARIANCE_DN2 / k**2 + mu_e)


def dark_noise_electrons(dark_variance_dn2: float, gain_dn_per_e: float) -> tuple[float, bool]:
    """Temporal dark noise sigma_d in e- (EMVA 1288 Eqs. 53-54).

    Returns
    -------
    sigma_d_e : float
        sqrt(sigma_y.dark^2 - sigma_q^2) / K; when sigma_y.dark^2 < 0.24 DN^2, the upper
        limit 0.40 / K (Eq. 54).
    upper_limit : bool
        True when only the upper limit could be given.
    """
    if dark_variance_dn2 < _DARK_VAR_FLOOR_DN2:
        return 0.40 / gain_dn_per_e, True
    return math.sqrt(dark_variance_dn2 - QUANTIZATION_VARIANCE_DN2) / gain_dn_per_e, False


def sensitivity_threshold(dark_variance_dn2: float, gain_dn_per_e: float, *,
                          eta: float | None = None) -> dict[str, float | None]:
    """Absolute sensitivity threshold (EMVA 1288 Eqs. 26-27, R3.1 approximation Eq. 88).

    Parameters
    ----------
    dark_variance_dn2 : float
        sigma_y.dark^2 (clamped to 0.24 DN^2 from below as Eq. 54 prescribes).
    gain_dn_per_e : float
        K.
    eta : float, optional
        Quantum efficiency; needed for the threshold in photons.

    Returns
    -------
    dict with ``electrons`` (mu_e.min), ``photons`` (mu_p.min or None) and
    ``photons_r31`` ((1/eta)(sigma_y.dark/K + 1/2) or None).
    """
    var = max(dark_variance_dn2, _DARK_VAR_FLOOR_DN2)
    k = gain_dn_per_e
    mu_e_min = math.sqrt(var / k**2 + 0.25) + 0.5
    out: dict[str, float | None] = {"electrons": mu_e_min, "photons": None, "photons_r31": None}
    if eta:
        out["photons"] = mu_e_min / eta
        out["photons_r31"] = (math.sqrt(var) / k + 0.5) / eta
    return out


# ============================================================ linearity error
@dataclass(frozen=True)
class LinearityError:
    """Linearity error of mean grey value against exposure (EMVA 1288 section 6.9).

    Attributes
    ----------
    le_pct : float
        LE = mean |delta_y| over the fitted points (Eq. 63), in %.
    le_min_pct, le_max_pct : float
        Smallest and largest delta_y (the R3.1 way of reporting), %.
    offset_dn : float
        a0 of Eq. 59, DN.
    slope_dn_per_h : float
        a1 of Eq. 60, DN per unit of H.
    used : (n,) ndarray of bool
        Points inside ``range_fraction`` of the saturation signal.
    deviation_pct : (n,) ndarray of float
        delta_y (Eq. 62) for every point (NaN outside the range), %.
    range_fraction : (float, float)
        Lower and upper bound as fractions of y_sat.
    saturation_dn : float
        y_sat = mu_y.sat - mu_y.dark, DN.
    """

    le_pct: float
    le_min_pct: float
    le_max_pct: float
    offset_dn: float
    slope_dn_per_h: float
    used: NDArray[np.bool_] = field(repr=False)
    deviation_pct: NDArray[np.float64] = field(repr=False)
    range_fraction: tuple[float, float]
    saturation_dn: float

    @property
    def n_points(self) -> int:
        """Number of points in the fit."""
        return int(np.count_nonzero(self.used))

    def to_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready; NaN deviations become None)."""
        return {
            "le_pct": self.le_pct, "le_min_pct": self.le_min_pct, "le_max_pct": self.le_max_pct,
            "offset_dn": self.offset_dn, "slope_dn_per_h": self.slope_dn_per_h,
            "n_points": self.n_points, "range_fraction": list(self.range_fraction),
            "saturation_dn": self.saturation_dn,
            "deviation_pct": [None if not np.isfinite(v) else float(v) for v in self.deviation_pct],
        }


def linearity_error(h: ArrayLike, y: ArrayLike, *, saturation_dn: float,
                    range_fraction: tuple[float, float] = (0.05, 0.95)) -> LinearityError:
    """Linearity error LE (EMVA 1288 Release 4.0, Eqs. 58-63).

    The line y = a0 + a1 H is fitted to the points with y in ``range_fraction`` of
    ``saturation_dn`` by minimising the relative deviation sum (1/y^2)(y - a0 - a1 H)^2,
    solved in closed form (Eqs. 59-61). delta_y = 100 (y - fit)/fit (Eq. 62) and
    LE = mean |delta_y| (Eq. 63).

    Parameters
    ----------
    h : (n,) array_like
        Exposure quantity H (photons per pixel, or exposure time x light level).
    y : (n,) array_like
        Mean grey value above dark, mu_y - mu_y.dark, DN.
    saturation_dn : float
        y at saturation, mu_y.sat - mu_y.dark, DN.
    range_fraction : (float, float)
        Bounds of the fitted range as fractions of ``saturation_dn``.

    Raises
    ------
    InputFormatError
        Fewer than three points in range, or all at the same H.
    """
    hh = np.asarray(h, dtype=np.float64)
    yy = np.asarray(y, dtype=np.float64)
    if hh.shape != yy.shape or hh.ndim != 1:
        raise ShapeMismatchError("H and y must be 1-D arrays of the same length")
    lo, hi = range_fraction
    used = (yy >= lo * saturation_dn) & (yy <= hi * saturation_dn) & (yy > 0)
    if np.count_nonzero(used) < 3:
        raise InputFormatError(
            f"only {int(np.count_nonzero(used))} level(s) lie within {lo:.0%}-{hi:.0%} of "
            "saturation; the linearity error needs at least 3 (the standard asks for 50)"
        )
    x = hh[used]
    v = yy[used]
    s_h_y = np.sum(x / v)
    s_h_y2 = np.sum(x / v**2)
    s_h2_y2 = np.sum(x**2 / v**2)
    s_1_y = np.sum(1.0 / v)
    s_1_y2 = np.sum(1.0 / v**2)
    delta = s_h_y2**2 - s_h2_y2 * s_1_y2  # Eq. 61
    if delta == 0 or not np.isfinite(delta):
        raise InputFormatError("the levels in the linearity range all have the same exposure")
    a0 = (s_h_y * s_h_y2 - s_h2_y2 * s_1_y) / delta  # Eq. 59
    a1 = (s_h_y2 * s_1_y - s_h_y * s_1_y2) / delta  # Eq. 60
    fit = a0 + a1 * hh
    dev = np.full(hh.shape, np.nan)
    dev[used] = 100.0 * (yy[used] - fit[used]) / fit[used]  # Eq. 62
    d = dev[used]
    return LinearityError(
        le_pct=float(np.mean(np.abs(d))), le_min_pct=float(d.min()), le_max_pct=float(d.max()),
        offset_dn=float(a0), slope_dn_per_h=float(a1), used=used, deviation_pct=dev,
        range_fraction=(float(lo), float(hi)), saturation_dn=float(saturation_dn),
    )


# ============================================================ saturation
@dataclass(frozen=True)
class SaturationPoint:
    """Saturation of a photon-transfer series.

    Attributes
    ----------
    mean_dn : float
        mu_y.sat by the R4 rule (0.1-0.2 % of pixels at the maximum code), DN.
    h : float
        Exposure quantity at that point.
    method : {"within_band", "interpolated", "not_reached"}
        ``within_band``: a level has 0.1-0.2 % of pixels at the maximum (the first such
        level is used); ``interpolated``: no level falls in the band, so H and mu_y are
        interpolated linearly between the last level below 0.1 % and the first above
        0.2 % at the band centre 0.15 % (our convention); ``not_reached``: no level reaches
        0.1 %, the brightest level is used and the saturation figures are lower bounds.
    index : int
        Level used (for ``interpolated``: the first level above the band).
    variance_max_index : int
        Level with the largest temporal variance (the R3.1 rule).
    variance_max_mean_dn : float
        mu_y at that level, DN.
    """

    mean_dn: float
    h: float
    method: str
    index: int
    variance_max_index: int
    variance_max_mean_dn: float

    def to_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready)."""
        return asdict(self)


def find_saturation(h: ArrayLike, mean_dn: ArrayLike, saturated_fraction: ArrayLike,
                    variance_dn2: ArrayLike, *, max_code: float | None = None,
                    spatial_variance_dn2: ArrayLike | None = None,
                    band: tuple[float, float] = (0.001, 0.002)) -> SaturationPoint:
    """Locate saturation (EMVA 1288 R4 rule; R3.1 variance maximum beside it).

    If a level has between ``band[0]`` and ``band[1]`` of its pixels at the maximum code,
    the first such level is the saturation point. Otherwise the crossing of the band
    centre is interpolated between the last level below the band (i-1) and the first
    above it (i), on the normal-quantile scale z = Phi^-1(fraction), which is close to
    linear in H because the brightest pixels form a Gaussian tail: level i-1 uses the
    modelled z = (mu - max_code + 1/2) / sqrt(sigma_y^2 + s_y^2) from its temporal and
    spatial variance, level i its observed fraction (our convention; the standard
    assumes steps fine enough to hit the band). The mean grey value at the crossing
    is extrapolated from the two levels below the band, so that clipping does not bias it.

    Parameters
    ----------
    h, mean_dn, saturated_fraction, variance_dn2 : (n,) array_like
        Per level, sorted by increasing H.
    max_code : float, optional
        Maximum code; with ``spatial_variance_dn2`` enables the normal-quantile
        interpolation (else the fraction is interpolated linearly).
    spatial_variance_dn2 : (n,) array_like, optional
        Eq. 32 spatial variance per level.
    band : (float, float)
        Fraction of pixels at the maximum code that defines saturation.

    Raises
    ------
    InputFormatError
        When the darkest level already has more than the band's upper fraction saturated
        (every level saturated).
    """
    from scipy.stats import norm

    hh = np.asarray(h, float)
    mu = np.asarray(mean_dn, float)
    f = np.asarray(saturated_fraction, float)
    var = np.asarray(variance_dn2, float)
    lo, hi = band
    imax = int(np.argmax(var))
    above = np.nonzero(f >= lo)[0]
    if above.size == 0:
        i = int(np.argmax(hh))
        return SaturationPoint(float(mu[i]), float(hh[i]), "not_reached", i, imax, float(mu[imax]))
    i = int(above[0])
    if f[i] <= hi:
        return SaturationPoint(float(mu[i]), float(hh[i]), "within_band", i, imax, float(mu[imax]))
    if i == 0:
        raise InputFormatError(
            f"every level has at least {f[0]:.1%} of its pixels at the maximum code "
            "(all frames saturated); shorten the exposures or dim the light"
        )
    target = 0.5 * (lo + hi)
    if max_code is not None and spatial_variance_dn2 is not None:
        svar = np.asarray(spatial_variance_dn2, float)

        def z_model(j: int) -> float:
            sd = math.sqrt(max(var[j] + max(svar[j], 0.0), 1e-12))
            return (mu[j] - (max_code - 0.5)) / sd

        z_t = float(norm.ppf(target))
        if f[i] < 0.5:
            z0, z1, h0, h1 = z_model(i - 1), float(norm.ppf(f[i])), hh[i - 1], hh[i]
        elif i >= 2:
            z0, z1, h0, h1 = z_model(i - 2), z_model(i - 1), hh[i - 2], hh[i - 1]
        else:
            z0, z1, h0, h1 = z_model(i - 1), float(norm.ppf(min(f[i], 1 - 1e-9))), hh[i - 1], hh[i]
        w = (z_t - z0) / (z1 - z0) if z1 != z0 else 1.0
        h_sat = float(np.clip(h0 + w * (h1 - h0), hh[i - 1], hh[i]))
    else:
        w = (target - f[i - 1]) / (f[i] - f[i - 1])
        h_sat = float(hh[i - 1] + w * (hh[i] - hh[i - 1]))
    if i >= 2 and hh[i - 1] > hh[i - 2]:
        slope = (mu[i - 1] - mu[i - 2]) / (hh[i - 1] - hh[i - 2])
    else:
        slope = (mu[i] - mu[i - 1]) / (hh[i] - hh[i - 1]) if hh[i] > hh[i - 1] else 0.0
    mu_sat = float(mu[i - 1] + slope * (h_sat - hh[i - 1]))
    return SaturationPoint(mu_sat, h_sat, "interpolated", i, imax, float(mu[imax]))


# ============================================================ analysis
@dataclass(frozen=True)
class LevelMeasurement:
    """One illumination level of a photon-transfer series.

    Attributes
    ----------
    exposure_s : float
        Exposure time, s.
    flat : PairStatistics
        The flat-field pair.
    dark : PairStatistics
        The dark pair at the same settings.
    level : float
        Relative light level (1 when the exposure time is stepped).
    photons : float or None
        Mean photons per pixel mu_p, when known.
    """

    exposure_s: float
    flat: PairStatistics
    dark: PairStatistics
    level: float = 1.0
    photons: float | None = None

    @property
    def h(self) -> float:
        """Exposure quantity H: photons if known, else exposure_s x level."""
        return float(self.photons) if self.photons is not None else self.exposure_s * self.level


@dataclass(frozen=True)
class Nonuniformity:
    """DSNU and PRNU (EMVA 1288 Eqs. 66-67).

    Attributes
    ----------
    dsnu_e : float
        DSNU1288 = s_y.dark / K, e-.
    dsnu_dn : float
        s_y.dark, DN.
    prnu_pct : float or None
        PRNU1288 = sqrt(s_y.50^2 - s_y.dark^2) / (mu_y.50 - mu_y.dark), %; None without a
        bright stack.
    dark_spatial_variance_dn2, bright_spatial_variance_dn2 : float
    bright_mean_above_dark_dn : float
        mu_y.50 - mu_y.dark of the bright data, DN.
    bright_fraction_of_saturation : float
        Where the bright data sits relative to saturation (the standard uses 50 %).
    method : str
        ``"stack"`` (L averaged frames, Eqs. 35, 36, 65) or ``"pair"`` (two frames, Eq. 32).
    n_dark_frames, n_bright_frames : int
    highpass : bool
    """

    dsnu_e: float
    dsnu_dn: float
    prnu_pct: float | None
    dark_spatial_variance_dn2: float
    bright_spatial_variance_dn2: float | None
    bright_mean_above_dark_dn: float | None
    bright_fraction_of_saturation: float | None
    method: str
    n_dark_frames: int
    n_bright_frames: int
    highpass: bool

    def to_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready)."""
        return asdict(self)


def nonuniformity(dark: StackStatistics | PairStatistics,
                  bright: StackStatistics | PairStatistics | None, *,
                  gain_dn_per_e: float, saturation_above_dark_dn: float | None = None,
                  ) -> Nonuniformity:
    """DSNU1288 and PRNU1288 from dark and bright (about 50 % saturation) data.

    Parameters
    ----------
    dark, bright : StackStatistics or PairStatistics
        Stacks give Eq. 36 spatial variances; pairs give the Eq. 32 estimate.
    gain_dn_per_e : float
        K, DN/e-.
    saturation_above_dark_dn : float, optional
        mu_y.sat - mu_y.dark, to report where the bright data sits.
    """
    def svar(s: StackStatistics | PairStatistics) -> float:
        return s.spatial_variance_dn2

    def nframes(s: StackStatistics | PairStatistics) -> int:
        return s.n_frames if isinstance(s, StackStatistics) else 2

    s2_dark = svar(dark)
    s_dark = math.sqrt(max(s2_dark, 0.0))
    method = "stack" if isinstance(dark, StackStatistics) else "pair"
    highpass = isinstance(dark, StackStatistics) and dark.highpass
    prnu = s2_bright = above = frac = None
    if bright is not None:
        s2_bright = svar(bright)
        above = bright.mean_dn - dark.mean_dn
        if above > 0:
            prnu = 100.0 * math.sqrt(max(s2_bright - s2_dark, 0.0)) / above
        if saturation_above_dark_dn:
            frac = above / saturation_above_dark_dn
        if isinstance(bright, PairStatistics):
            method = "pair" if method == "pair" else "stack+pair"
        elif method == "pair":
            method = "pair+stack"
    return Nonuniformity(
        dsnu_e=s_dark / gain_dn_per_e, dsnu_dn=s_dark, prnu_pct=prnu,
        dark_spatial_variance_dn2=s2_dark, bright_spatial_variance_dn2=s2_bright,
        bright_mean_above_dark_dn=above, bright_fraction_of_saturation=frac, method=method,
        n_dark_frames=nframes(dark), n_bright_frames=0 if bright is None else nframes(bright),
        highpass=highpass,
    )


@dataclass(frozen=True)
class PhotonTransferSettings:
    """Options of the photon-transfer evaluation (defaults follow EMVA 1288 R4).

    Attributes
    ----------
    gain_range : (float, float)
        Fit range of Eq. 50 as fractions of the saturation signal above dark (0-70 %).
    le_range : (float, float)
        Range of the linearity error (5-95 %).
    saturation_band : (float, float)
        Fraction of pixels at the maximum code defining saturation (0.1-0.2 %).
    ptc_linearity_limit : float
        Largest mean relative deviation of the local PTC slope for the linear model (3 %).
    eta : float or None
        Quantum efficiency (0..1), when known from elsewhere; enables thresholds in photons.
    highpass : bool
        High-pass filter (section 8.1) before DSNU/PRNU.
    min_stack_frames : int
        A group with at least this many frames is used as a DSNU/PRNU stack.
    """

    gain_range: tuple[float, float] = (0.0, 0.7)
    le_range: tuple[float, float] = (0.05, 0.95)
    saturation_band: tuple[float, float] = (0.001, 0.002)
    ptc_linearity_limit: float = 0.03
    eta: float | None = None
    highpass: bool = False
    min_stack_frames: int = 16


@dataclass(frozen=True, eq=False)
class PhotonTransferResult:
    """EMVA 1288 photon-transfer figures of one camera channel.

    All grey values are DN, variances DN^2, charges e-; ``h`` is the exposure quantity in
    ``h_unit`` ("photons" when mu_p is known, else "s" = exposure time x light level).
    """

    levels: tuple[LevelMeasurement, ...]
    h_unit: str
    gain_dn_per_e: float
    gain_se_dn_per_e: float
    gain_fit_offset_dn2: float
    gain_fit_used: NDArray[np.bool_] = field(repr=False)
    dark_variance_dn2: float = 0.0
    dark_noise_dn: float = 0.0
    dark_noise_e: float = 0.0
    dark_noise_upper_limit: bool = False
    saturation: SaturationPoint | None = None
    saturation_above_dark_dn: float = 0.0
    saturation_capacity_e: float = 0.0
    snr_max: float = 0.0
    sensitivity_threshold_e: float = 0.0
    sensitivity_threshold_photons: float | None = None
    sensitivity_threshold_photons_r31: float | None = None
    dynamic_range: float = 0.0
    linearity: LinearityError | None = None
    ptc_nonlinearity_pct: float | None = None
    ptc_local_gain_dn_per_e: NDArray[np.float64] | None = field(default=None, repr=False)
    linear_model_applies: bool | None = None
    responsivity: float = 0.0
    responsivity_unit: str = ""
    eta: float | None = None
    eta_source: str | None = None
    nonuniformity: Nonuniformity | None = None
    dark_current_e_per_s: float | None = None
    dark_current_variance_e_per_s: float | None = None
    notes: tuple[str, ...] = ()
    provenance: dict[str, Any] = field(default_factory=dict)

    # ---------------------------------------------------------------- tables
    def to_frame(self) -> pd.DataFrame:
        """Per-level table: H, means, variances, SNR, flags of use."""
        rows = []
        for i, lv in enumerate(self.levels):
            above = lv.flat.mean_dn - lv.dark.mean_dn
            sig = math.sqrt(max(lv.flat.temporal_variance_dn2, 0.0))
            rows.append({
                "level": i,
                "h": lv.h,
                "exposure_s": lv.exposure_s,
                "light_level": lv.level,
                "photons": lv.photons,
                "mean_dn": lv.flat.mean_dn,
                "dark_mean_dn": lv.dark.mean_dn,
                "mean_above_dark_dn": above,
                "variance_dn2": lv.flat.temporal_variance_dn2,
                "dark_variance_dn2": lv.dark.temporal_variance_dn2,
                "variance_above_dark_dn2": lv.flat.temporal_variance_dn2
                - lv.dark.temporal_variance_dn2,
                "snr": above / sig if sig > 0 else float("nan"),
                "saturated_fraction": lv.flat.saturated_fraction,
                "in_gain_fit": bool(self.gain_fit_used[i]),
                "in_linearity_fit": bool(self.linearity.used[i]) if self.linearity else False,
                "linearity_deviation_pct": float(self.linearity.deviation_pct[i])
                if self.linearity else float("nan"),
            })
        cols = ["level", "h", "exposure_s", "light_level", "photons", "mean_dn", "dark_mean_dn",
                "mean_above_dark_dn", "variance_dn2", "dark_variance_dn2",
                "variance_above_dark_dn2", "snr", "saturated_fraction", "in_gain_fit",
                "in_linearity_fit", "linearity_deviation_pct"]
        return pd.DataFrame(rows, columns=cols)

    def to_dict(self) -> dict[str, Any]:
        """Every figure with its unit in the key (camera.json)."""
        def db(x: float | None) -> float | None:
            return None if not x or x <= 0 else 20.0 * math.log10(x)

        table = self.to_frame()
        levels = json.loads(table.to_json(orient="records"))
        return {
            "standard": "EMVA 1288 Release 4.0 Linear",
            "h_unit": self.h_unit,
            "n_levels": len(self.levels),
            "n_pixels": self.levels[0].flat.n_pixels if self.levels else 0,
            "system_gain_dn_per_e": self.gain_dn_per_e,
            "system_gain_se_dn_per_e": self.gain_se_dn_per_e,
            "inverse_gain_e_per_dn": 1.0 / self.gain_dn_per_e,
            "gain_fit_offset_dn2": self.gain_fit_offset_dn2,
            "gain_fit_n_points": int(np.count_nonzero(self.gain_fit_used)),
            "dark_variance_dn2": self.dark_variance_dn2,
            "temporal_dark_noise_dn": self.dark_noise_dn,
            "temporal_dark_noise_e": self.dark_noise_e,
            "temporal_dark_noise_is_upper_limit": self.dark_noise_upper_limit,
            "saturation": None if self.saturation is None else self.saturation.to_dict(),
            "saturation_mean_dn": None if self.saturation is None else self.saturation.mean_dn,
            "saturation_above_dark_dn": self.saturation_above_dark_dn,
            "saturation_capacity_e": self.saturation_capacity_e,
            "snr_max": self.snr_max,
            "snr_max_db": db(self.snr_max),
            "snr_max_bits": math.log2(self.snr_max) if self.snr_max > 0 else None,
            "absolute_sensitivity_threshold_e": self.sensitivity_threshold_e,
            "absolute_sensitivity_threshold_photons": self.sensitivity_threshold_photons,
            "absolute_sensitivity_threshold_photons_r31": self.sensitivity_threshold_photons_r31,
            "dynamic_range": self.dynamic_range,
            "dynamic_range_db": db(self.dynamic_range),
            "linearity_error": None if self.linearity is None else self.linearity.to_dict(),
            "linearity_error_pct": None if self.linearity is None else self.linearity.le_pct,
            "ptc_nonlinearity_pct": self.ptc_nonlinearity_pct,
            "linear_model_applies": self.linear_model_applies,
            "responsivity": self.responsivity,
            "responsivity_unit": self.responsivity_unit,
            "quantum_efficiency": self.eta,
            "quantum_efficiency_source": self.eta_source,
            "nonuniformity": None if self.nonuniformity is None else self.nonuniformity.to_dict(),
            "dsnu_e": None if self.nonuniformity is None else self.nonuniformity.dsnu_e,
            "prnu_pct": None if self.nonuniformity is None else self.nonuniformity.prnu_pct,
            "dark_current_e_per_s": self.dark_current_e_per_s,
            "dark_current_from_variance_e_per_s": self.dark_current_variance_e_per_s,
            "verdict": self.verdict(),
            "notes": list(self.notes),
            "levels": levels,
            "provenance": self.provenance,
        }

    def verdict(self) -> list[str]:
        """Plain-language conclusions in the standard's terms."""
        out: list[str] = []
        if self.ptc_nonlinearity_pct is not None:
            lim = 100.0 * self.provenance.get("settings", {}).get("ptc_linearity_limit", 0.03)
            if self.linear_model_applies:
                out.append(
                    f"PTC linearity (Eq. 51): mean |K_i - K|/K = {self.ptc_nonlinearity_pct:.2f} % "
                    f"< {lim:g} %: the linear model of EMVA 1288 applies."
                )
            else:
                out.append(
                    f"PTC linearity (Eq. 51): mean |K_i - K|/K = {self.ptc_nonlinearity_pct:.2f} % "
                    f">= {lim:g} %: the linear model does not apply; characterise the camera "
                    "with the EMVA 1288 General model."
                )
        else:
            out.append("PTC linearity (Eq. 51) not evaluated: fewer than 5 levels in 0-70 %.")
        if self.linearity is not None:
            lo, hi = self.linearity.range_fraction
            out.append(
                f"Linearity error LE = {self.linearity.le_pct:.3f} % over {lo:.0%}-{hi:.0%} of "
                f"saturation ({self.linearity.n_points} levels; min/max deviation "
                f"{self.linearity.le_min_pct:+.3f} / {self.linearity.le_max_pct:+.3f} %)."
            )
        if self.dark_noise_upper_limit:
            noise = f"< {self.dark_noise_e:.2f} e- (upper limit, Eq. 54)"
        else:
            noise = f"{self.dark_noise_dn:.3f} DN = {self.dark_noise_e:.2f} e-"
        out.append(
            f"System gain K = {self.gain_dn_per_e:.4f} +/- {self.gain_se_dn_per_e:.4f} DN/e- "
            f"(1/K = {1.0 / self.gain_dn_per_e:.3f} e-/DN); temporal dark noise {noise}."
        )
        if self.saturation is not None:
            lower = (" (lower bound: saturation not reached)"
                     if self.saturation.method == "not_reached" else "")
            out.append(
                f"Saturation capacity {self.saturation_capacity_e:.0f} e-{lower}; "
                f"SNRmax {self.snr_max:.1f} ({20 * math.log10(max(self.snr_max, 1e-300)):.1f} dB); "
                f"dynamic range {self.dynamic_range:.0f} "
                f"({20 * math.log10(max(self.dynamic_range, 1e-300)):.1f} dB)."
            )
        if self.nonuniformity is not None:
            nu = self.nonuniformity
            prnu = "n/a" if nu.prnu_pct is None else f"{nu.prnu_pct:.2f} %"
            out.append(f"DSNU1288 = {nu.dsnu_e:.2f} e-, PRNU1288 = {prnu} ({nu.method} estimate).")
        return out


def _fit_line(x: NDArray[np.float64], y: NDArray[np.float64]) -> tuple[float, float, float]:
    """Ordinary least squares y = b0 + b1 x; returns (b1, b0, se(b1))."""
    n = x.size
    xm, ym = x.mean(), y.mean()
    sxx = float(np.sum((x - xm) ** 2))
    if sxx == 0:
        raise InputFormatError("the levels used for the gain fit all have the same mean grey value")
    b1 = float(np.sum((x - xm) * (y - ym)) / sxx)
    b0 = float(ym - b1 * xm)
    if n > 2:
        s2 = float(np.sum((y - b0 - b1 * x) ** 2) / (n - 2))
        se = math.sqrt(s2 / sxx)
    else:
        se = float("nan")
    return b1, b0, se


def _ptc_local_slopes(x: NDArray[np.float64], y: NDArray[np.float64],
                      sd: NDArray[np.float64]) -> NDArray[np.float64] | None:
    """Local slopes K_i of a cubic smoothing B-spline through the PTC points (Eq. 51).

    Weights 1/sd with sd from Eq. 19, smoothing s = n (the expected chi-square), so a
    straight PTC gives a nearly straight spline. Our choice of smoothing; the standard
    prescribes a cubic B-spline without fixing its knots.
    """
    if x.size < 5:
        return None
    from scipy.interpolate import UnivariateSpline

    order = np.argsort(x, kind="stable")
    xs, ys, ws = x[order], y[order], 1.0 / np.maximum(sd[order], 1e-12)
    if np.any(np.diff(xs) <= 0):
        return None
    spl = UnivariateSpline(xs, ys, w=ws, k=3, s=float(xs.size))
    slopes = np.empty_like(x)
    slopes[order] = spl.derivative()(xs)
    return slopes


def analyse_photon_transfer(
    levels: Sequence[LevelMeasurement], *,
    settings: PhotonTransferSettings = PhotonTransferSettings(),
    nonuniformity_stacks: tuple[StackStatistics | None, StackStatistics | None] | None = None,
    provenance: dict[str, Any] | None = None,
) -> PhotonTransferResult:
    """Evaluate a photon-transfer series (EMVA 1288 section 6.6 and 6.9).

    Parameters
    ----------
    levels : sequence of LevelMeasurement
        At least three flat levels (any order; they are sorted by H).
    settings : PhotonTransferSettings
    nonuniformity_stacks : (dark, bright) StackStatistics, optional
        Stacks for DSNU/PRNU; without them the two-image estimate (Eq. 32) is reported
        from the dark pair at the shortest exposure and the flat pair nearest 50 %.
    provenance : dict, optional
        Extra provenance merged into the result's.

    Raises
    ------
    InputFormatError
        Too few levels, all levels saturated, or no usable gain fit.
    """
    if len(levels) < 3:
        raise InputFormatError(
            f"{len(levels)} flat level(s) given; photon transfer needs at least 3 "
            "(EMVA 1288 asks for 50, at least 9 for production)"
        )
    notes: list[str] = []
    if any(m.photons is not None for m in levels) and any(m.photons is None for m in levels):
        notes.append("photons were given for some levels only; H is exposure time x level")
        levels = [LevelMeasurement(m.exposure_s, m.flat, m.dark, m.level, None) for m in levels]
    lv = tuple(sorted(levels, key=lambda m: m.h))
    h = np.array([m.h for m in lv])
    mu = np.array([m.flat.mean_dn for m in lv])
    mu_dark = np.array([m.dark.mean_dn for m in lv])
    var = np.array([m.flat.temporal_variance_dn2 for m in lv])
    var_dark = np.array([m.dark.temporal_variance_dn2 for m in lv])
    satf = np.array([m.flat.saturated_fraction for m in lv])
    npix = np.array([m.flat.n_pixels for m in lv], dtype=float)
    above = mu - mu_dark
    var_above = var - var_dark

    svar = np.array([m.flat.spatial_variance_dn2 for m in lv])
    max_codes = {m.flat.max_code for m in lv}
    max_code = max_codes.pop() if len(max_codes) == 1 else None
    sat = find_saturation(h, mu, satf, var, max_code=max_code, spatial_variance_dn2=svar,
                          band=settings.saturation_band)
    i_sat = min(sat.index, len(lv) - 1)
    y_sat = sat.mean_dn - float(mu_dark[i_sat])
    if y_sat <= 0:
        raise InputFormatError("the flat frames are not brighter than the dark frames")
    if sat.method == "not_reached":
        hint = ""
        top = lv[-1].flat
        if (top.observed_max_dn is not None and top.observed_max_fraction >= 0.01
                and (top.max_code is None or top.observed_max_dn < top.max_code)):
            hint = (f"; {top.observed_max_fraction:.0%} of the brightest level's pixels sit at "
                    f"code {top.observed_max_dn:g}, so the sensor maximum is probably "
                    f"{top.observed_max_dn:g}: give it as the maximum code (--max-code)")
        notes.append("saturation was not reached: the brightest level stands in for it, so "
                     "saturation capacity, SNRmax and dynamic range are lower bounds" + hint)
        warnings.warn("photon transfer: no level reaches 0.1 % of pixels at the maximum "
                      "code; saturation figures are lower bounds" + hint, CameraWarning,
                      stacklevel=2)
    if sat.method == "interpolated":
        notes.append("no level has 0.1-0.2 % of pixels at the maximum code; saturation was "
                     "interpolated between neighbouring levels (use finer steps near saturation)")

    # System gain, Eq. 50: unknown offset and slope over 0-70 % of saturation.
    glo, ghi = settings.gain_range
    gain_used = above <= ghi * y_sat  # "from the minimum" when the lower bound is 0
    if glo > 0:
        gain_used &= above >= glo * y_sat
    gain_used &= satf < settings.saturation_band[0]
    if np.count_nonzero(gain_used) < 3:
        raise InputFormatError(
            f"only {int(np.count_nonzero(gain_used))} level(s) lie within "
            f"{glo:.0%}-{ghi:.0%} of saturation; the gain fit needs at least 3"
        )
    k, k0, k_se = _fit_line(above[gain_used], var_above[gain_used])
    if not k > 0:
        raise InputFormatError(
            f"the photon transfer slope is {k:.3g} DN/e-, not positive; check that flat "
            "and dark frames are not swapped and that the light was stable"
        )

    # PTC linearity, Eq. 51.
    sd = np.sqrt(2.0 / npix) * np.abs(var)
    slopes = _ptc_local_slopes(above[gain_used], var_above[gain_used], sd[gain_used])
    ptc_nl = None if slopes is None else float(100.0 * np.mean(np.abs(slopes - k) / k))
    applies = None if ptc_nl is None else ptc_nl < 100.0 * settings.ptc_linearity_limit

    # Temporal dark noise at the shortest exposure, Eqs. 53-54.
    i0 = int(np.argmin([m.exposure_s for m in lv]))
    dvar = float(var_dark[i0])
    sigma_d_e, upper = dark_noise_electrons(dvar, k)
    sigma_d_dn = math.sqrt(max(dvar, _DARK_VAR_FLOOR_DN2)) if upper else math.sqrt(dvar)
    if upper:
        notes.append("sigma_y.dark^2 < 0.24 DN^2: the dark noise is an upper limit (Eq. 54)")
        sigma_d_dn = 0.49

    # Responsivity, Eq. 49 (zero offset, same range as the gain fit).
    resp_used = gain_used & (h > 0)
    have_photons = all(m.photons is not None for m in lv)
    x = h[resp_used]
    responsivity = float(np.sum(x * above[resp_used]) / np.sum(x * x)) if x.size else float("nan")
    if have_photons:
        resp_unit = "DN/photon"
        eta: float | None = responsivity / k  # Eq. 52
        eta_source = "measured (Eq. 52)"
    else:
        resp_unit = "DN/s" if all(m.level == 1.0 for m in lv) else "DN/(s x light level)"
        eta = settings.eta
        eta_source = "given" if eta is not None else None

    mu_e_sat = y_sat / k
    thr = sensitivity_threshold(dvar, k, eta=eta)
    dyn = mu_e_sat / float(thr["electrons"])  # = mu_p.sat / mu_p.min (Eq. 28)

    le: LinearityError | None
    try:
        le = linearity_error(h, above, saturation_dn=y_sat, range_fraction=settings.le_range)
    except InputFormatError as err:
        le = None
        notes.append(f"linearity error not computed: {err.reason}")

    # Nonuniformity.
    nu: Nonuniformity | None = None
    d_stack, b_stack = nonuniformity_stacks or (None, None)
    dark_src: StackStatistics | PairStatistics = d_stack if d_stack is not None else lv[i0].dark
    if b_stack is not None:
        bright_src: StackStatistics | PairStatistics | None = b_stack
    else:
        ok = np.nonzero(satf < settings.saturation_band[0])[0]
        j = int(ok[np.argmin(np.abs(above[ok] - 0.5 * y_sat))]) if ok.size else None
        bright_src = None if j is None else lv[j].flat
    nu = nonuniformity(dark_src, bright_src, gain_dn_per_e=k, saturation_above_dark_dn=y_sat)

    # Dark current from at least 6 dark exposure times (Eqs. 29-30).
    dc = dcv = None
    t_dark = np.array([m.exposure_s for m in lv])
    if np.unique(t_dark).size >= 6 and np.ptp(t_dark) > 0:
        dc = float(np.polyfit(t_dark, mu_dark, 1)[0] / k)
        dcv = float(np.polyfit(t_dark, var_dark, 1)[0] / k**2)

    if len(lv) < 9:
        notes.append(f"{len(lv)} levels: EMVA 1288 asks for at least 50 (9 for production)")

    prov = {
        "function": "analyse_photon_transfer",
        "ecl_quant_version": __version__,
        "numpy_version": np.__version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "settings": asdict(settings),
    }
    if provenance:
        prov.update(provenance)
    return PhotonTransferResult(
        levels=lv, h_unit="photons" if have_photons else "s", gain_dn_per_e=k,
        gain_se_dn_per_e=k_se, gain_fit_offset_dn2=k0, gain_fit_used=gain_used,
        dark_variance_dn2=dvar, dark_noise_dn=sigma_d_dn, dark_noise_e=sigma_d_e,
        dark_noise_upper_limit=upper, saturation=sat, saturation_above_dark_dn=y_sat,
        saturation_capacity_e=mu_e_sat, snr_max=math.sqrt(mu_e_sat),
        sensitivity_threshold_e=float(thr["electrons"]),
        sensitivity_threshold_photons=thr["photons"],
        sensitivity_threshold_photons_r31=thr["photons_r31"], dynamic_range=dyn,
        linearity=le, ptc_nonlinearity_pct=ptc_nl, ptc_local_gain_dn_per_e=slopes,
        linear_model_applies=applies, responsivity=responsivity, responsivity_unit=resp_unit,
        eta=eta, eta_source=eta_source, nonuniformity=nu, dark_current_e_per_s=dc,
        dark_current_variance_e_per_s=dcv, notes=tuple(notes), provenance=prov,
    )


def photon_transfer(
    flat_pairs: Sequence[Sequence[ArrayLike]],
    dark_pairs: Sequence[Sequence[ArrayLike]],
    exposure_s: ArrayLike, *,
    photons: ArrayLike | None = None,
    light_level: ArrayLike | None = None,
    max_code: float,
    settings: PhotonTransferSettings = PhotonTransferSettings(),
) -> PhotonTransferResult:
    """Photon transfer from in-memory image pairs (array front end of the analysis).

    Parameters
    ----------
    flat_pairs : sequence of (image_a, image_b)
        One flat-field pair per level. Extra images beyond two are ignored.
    dark_pairs : sequence of (image_a, image_b)
        One dark pair per level, or a single pair used for every level.
    exposure_s : (n,) array_like
        Exposure time of each level, s.
    photons : (n,) array_like, optional
        Mean photons per pixel mu_p of each level.
    light_level : (n,) array_like, optional
        Relative light level (when the light is stepped at fixed exposure).
    max_code : float
        Sensor maximum code (2**k - 1 or lower).
    settings : PhotonTransferSettings

    Raises
    ------
    InputFormatError
        A level with fewer than two images, mismatched lengths, or too few levels.
    ShapeMismatchError
        Images of a pair of different sizes.
    """
    t = np.atleast_1d(np.asarray(exposure_s, dtype=float))
    n = len(flat_pairs)
    if t.size != n:
        raise InputFormatError(f"{n} flat pairs but {t.size} exposure times")
    if len(dark_pairs) not in (1, n):
        raise InputFormatError(f"{len(dark_pairs)} dark pairs for {n} levels; give one per "
                               "level or a single pair")
    p = None if photons is None else np.asarray(photons, dtype=float)
    lvl = np.ones(n) if light_level is None else np.asarray(light_level, dtype=float)
    dark_stats = [_pair_of(d, f"dark pair {i}", max_code) for i, d in enumerate(dark_pairs)]
    levels = []
    for i, pair in enumerate(flat_pairs):
        flat = _pair_of(pair, f"level {i} (exposure {t[i]:g} s)", max_code)
        dark = dark_stats[i if len(dark_stats) > 1 else 0]
        levels.append(LevelMeasurement(exposure_s=float(t[i]), flat=flat, dark=dark,
                                       level=float(lvl[i]),
                                       photons=None if p is None else float(p[i])))
    return analyse_photon_transfer(levels, settings=settings,
                                   provenance={"max_code": float(max_code)})


def _pair_of(images: Sequence[ArrayLike], what: str, max_code: float | None) -> PairStatistics:
    if len(images) < 2:
        raise InputFormatError(
            f"{what} has {len(images)} image; EMVA 1288 needs two images per level "
            "(the temporal variance comes from their difference)"
        )
    return pair_statistics(images[0], images[1], max_code=max_code)


# ============================================================ folders and manifests
@dataclass(frozen=True)
class LevelGroup:
    """Image files taken at one setting.

    Attributes
    ----------
    role : {"flat", "dark"}
    exposure_s : float
    level : float
    photons : float or None
    files : tuple of Path
    """

    role: str
    exposure_s: float
    level: float
    photons: float | None
    files: tuple[Path, ...]


def _num(text: str | None, what: str, where: Path, row: int, *, default: float | None = None,
         ) -> float | None:
    if text is None or str(text).strip() == "":
        return default
    try:
        v = float(text)
    except ValueError:
        raise InputFormatError(f"row {row}: {what} {text!r} is not a number; write it with a "
                               "dot as decimal separator, e.g. 0.01", path=where) from None
    if not math.isfinite(v) or v < 0:
        raise InputFormatError(f"row {row}: {what} {text!r} must be a finite number >= 0; "
                               "fix that row", path=where)
    return v


def _read_manifest(path: Path) -> list[LevelGroup]:
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.DictReader(fh))
    except (OSError, UnicodeDecodeError, csv.Error) as err:
        raise InputFormatError(f"cannot read the manifest ({err})", path=path) from err
    if not rows:
        raise InputFormatError("the manifest has no rows", path=path)
    need = {"file", "role", "exposure_s"}
    missing = need - set(rows[0].keys())
    if missing:
        raise InputFormatError(
            f"the manifest lacks column(s) {', '.join(sorted(missing))}; expected "
            "file,role,exposure_s[,level,photons]", path=path)
    groups: dict[tuple[str, float, float], list[Path]] = {}
    photons: dict[tuple[str, float, float], float | None] = {}
    for i, r in enumerate(rows, start=2):
        role = (r.get("role") or "").strip().lower()
        if role not in ("flat", "dark"):
            raise InputFormatError(f"row {i}: role {r.get('role')!r} must be flat or dark",
                                   path=path)
        t = _num(r.get("exposure_s"), "exposure_s", path, i)
        if t is None:
            raise InputFormatError(f"row {i}: exposure_s is empty", path=path)
        lvl = _num(r.get("level"), "level", path, i, default=1.0)
        f = (r.get("file") or "").strip()
        if not f:
            raise InputFormatError(f"row {i}: file is empty", path=path)
        if "\x00" in f:
            raise InputFormatError(f"row {i}: file {f!r} contains a NUL character; fix the "
                                   "file name in the manifest", path=path)
        base = path.parent.resolve()
        fp = (base / f).resolve()
        if not fp.is_relative_to(base):  # confined, like the paths of a batch manifest
            raise InputFormatError(f"row {i}: file {f!r} is outside the folder of the "
                                   "manifest; keep the frames next to it", path=path)
        if not fp.is_file():
            raise InputFormatError(f"row {i}: file {f!r} does not exist", path=path)
        key = (role, t, float(lvl if lvl is not None else 1.0))
        groups.setdefault(key, []).append(fp)
        ph = _num(r.get("photons"), "photons", path, i)
        photons[key] = ph if ph is not None else photons.get(key)
    return [LevelGroup(role=k[0], exposure_s=k[1], level=k[2], photons=photons[k],
                       files=tuple(v)) for k, v in groups.items()]


def _image_files(folder: Path) -> list[Path]:
    from .frames import RAW_SUFFIXES, STILL_SUFFIXES, natural_key

    try:
        entries = list(folder.iterdir())
    except OSError as err:
        raise InputFormatError(f"cannot list the folder ({err.strerror})", path=folder) from err
    return sorted((p for p in entries
                   if p.is_file() and p.suffix.lower() in STILL_SUFFIXES + RAW_SUFFIXES
                   and not p.name.startswith(".")), key=natural_key)


def _group_by_exif(folder: Path, role: str) -> list[LevelGroup]:
    from .frames import read_exif  # frames stage, read lazily (CLI start-up stays fast)

    files = _image_files(folder)
    if not files:
        raise InputFormatError("no image files found (png, tif, jpg, dng)", path=folder)
    groups: dict[float, list[Path]] = {}
    for f in files:
        t = read_exif(f).exposure_s
        if t is None:
            raise InputFormatError(
                f"{f.name} has no EXIF ExposureTime; add a {MANIFEST_NAME} manifest "
                "(file,role,exposure_s) to the folder", path=folder)
        groups.setdefault(round(float(t), 12), []).append(f)
    return [LevelGroup(role=role, exposure_s=t, level=1.0, photons=None, files=tuple(v))
            for t, v in sorted(groups.items())]


def discover_levels(folder: str | Path, *, dark: str | Path | None = None) -> list[LevelGroup]:
    """Find the flat and dark groups of a photon-transfer folder.

    ``FOLDER/levels.csv`` if present (see the module docstring), else the images of
    ``folder`` (flats) and ``dark`` (darks) grouped by EXIF ExposureTime.

    Raises
    ------
    InputFormatError
        Missing folder, malformed manifest, or images without exposure metadata.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputFormatError("not a folder; give the folder of flat-field frames", path=folder)
    manifest = folder / MANIFEST_NAME
    groups = _read_manifest(manifest) if manifest.is_file() else _group_by_exif(folder, "flat")
    if dark is not None:
        dpath = Path(dark)
        if not dpath.is_dir():
            raise InputFormatError("not a folder; give the folder of dark frames", path=dpath)
        dman = dpath / MANIFEST_NAME
        extra = _read_manifest(dman) if dman.is_file() else _group_by_exif(dpath, "dark")
        groups = [g for g in groups if g.role != "dark"] + [g for g in extra if g.role == "dark"]
    return groups


ChannelName = Literal["auto", "mono", "red", "green", "blue"]
_CHANNEL_INDEX = {"red": 0, "green": 1, "blue": 2}


def _plane(frame: Any, channel: str, roi: tuple[int, int, int, int] | None) -> NDArray[Any]:
    """The analysed plane of a frame, as stored codes (no conversion)."""
    data = frame.data
    cfa = getattr(frame, "cfa", None)
    if getattr(frame, "kind", "still") == "raw" and cfa is not None and channel != "mono":
        idx = _CHANNEL_INDEX.get("green" if channel == "auto" else channel, 1)
        cell = np.argwhere(np.asarray(cfa)[:2, :2] == idx)
        if cell.size == 0:
            raise InputFormatError(f"the raw mosaic has no {channel} photosites",
                                   path=frame.source)
        dy, dx = (int(v) for v in cell[0])
        data = data[dy::2, dx::2]
    elif data.ndim == 3:
        if channel == "mono":
            raise InputFormatError("colour frames need --channel red, green or blue",
                                   path=frame.source)
        data = data[..., _CHANNEL_INDEX.get("green" if channel == "auto" else channel, 1)]
    if roi is not None:
        x, y, w, h = roi
        if x < 0 or y < 0 or w <= 0 or h <= 0 or y + h > data.shape[0] or x + w > data.shape[1]:
            raise InputFormatError(
                f"region x={x}, y={y}, w={w}, h={h} does not fit the "
                f"{data.shape[1]}x{data.shape[0]} analysed plane", path=frame.source)
        data = data[y:y + h, x:x + w]
    return data


def _iter_planes(files: Sequence[Path], channel: str,
                 roi: tuple[int, int, int, int] | None) -> Iterator[tuple[NDArray[Any], float]]:
    from .frames import iter_frames  # frames stage

    # fps=1: frame times do not matter here (and no TimingWarning); keep manifest order.
    for fr in iter_frames([str(f) for f in files], fps=1.0, sort=False):
        yield _plane(fr, channel, roi), float(fr.max_code)


def _group_pair(group: LevelGroup, channel: str, roi: tuple[int, int, int, int] | None,
                max_code: float | None) -> PairStatistics:
    if len(group.files) < 2:
        raise InputFormatError(
            f"the {group.role} level at {group.exposure_s:g} s (light level {group.level:g}) "
            f"has 1 frame ({group.files[0].name}); EMVA 1288 needs two images per level",
            path=group.files[0].parent)
    planes = list(_iter_planes(group.files[:2], channel, roi))
    (a, mca), (b, _) = planes
    if a.shape != b.shape:
        raise ShapeMismatchError(
            f"{group.files[1].name} is {_shape_text(b.shape)} but {group.files[0].name} is "
            f"{_shape_text(a.shape)}; both images of a pair must have one size",
            path=group.files[1])
    return pair_statistics(a, b, max_code=max_code if max_code is not None else mca)


def measure_photon_transfer(
    folder: str | Path, *, dark: str | Path | None = None, channel: ChannelName = "auto",
    roi: tuple[int, int, int, int] | None = None, max_code: float | None = None,
    settings: PhotonTransferSettings = PhotonTransferSettings(),
) -> PhotonTransferResult:
    """Photon transfer of a folder of flat and dark frames (see module docstring).

    Parameters
    ----------
    folder : str or Path
        Folder with ``levels.csv`` or images grouped by EXIF exposure time.
    dark : str or Path, optional
        Folder of dark frames (replaces dark rows of the manifest).
    channel : {"auto", "mono", "red", "green", "blue"}
        Colour plane analysed (auto: the frame itself if grey, else green; raw mosaics:
        that CFA colour's photosites).
    roi : (x, y, w, h), optional
        Analysed region in pixels of the plane.
    max_code : float, optional
        Sensor maximum code; default the frames' full-scale code.
    settings : PhotonTransferSettings

    Raises
    ------
    InputFormatError, ShapeMismatchError
    """
    folder = Path(folder)
    groups = discover_levels(folder, dark=dark)
    flats = sorted((g for g in groups if g.role == "flat"), key=lambda g: (g.exposure_s, g.level))
    darks = [g for g in groups if g.role == "dark"]
    if not flats:
        raise InputFormatError("no flat-field frames found", path=folder)
    if not darks:
        raise InputFormatError("no dark frames found; give --dark FOLDER or dark rows in "
                               f"{MANIFEST_NAME}", path=folder)
    try:
        dark_stats: dict[float, PairStatistics] = {}
        for g in darks:
            dark_stats[g.exposure_s] = _group_pair(g, channel, roi, max_code)
        levels = []
        for g in flats:
            if g.exposure_s in dark_stats:
                d = dark_stats[g.exposure_s]
            elif len(dark_stats) == 1:
                d = next(iter(dark_stats.values()))
            else:
                raise InputFormatError(
                    f"no dark frames at exposure {g.exposure_s:g} s; record a dark pair at "
                    "every exposure time of the flats", path=folder)
            levels.append(LevelMeasurement(exposure_s=g.exposure_s,
                                           flat=_group_pair(g, channel, roi, max_code),
                                           dark=d, level=g.level, photons=g.photons))
        stacks = _stacks(flats, darks, levels, channel, roi, settings)
        return analyse_photon_transfer(
            levels, settings=settings, nonuniformity_stacks=stacks,
            provenance={"source": str(folder), "dark_source": None if dark is None else str(dark),
                        "channel": channel, "roi": None if roi is None else list(roi),
                        "max_code": max_code,
                        "manifest": str(folder / MANIFEST_NAME)
                        if (folder / MANIFEST_NAME).is_file() else None},
        )
    except EclQuantError as err:
        if err.path is None:
            raise type(err)(err.reason, path=folder) from err
        raise


def _stacks(flats: list[LevelGroup], darks: list[LevelGroup], levels: list[LevelMeasurement],
            channel: str, roi: tuple[int, int, int, int] | None,
            settings: PhotonTransferSettings,
            ) -> tuple[StackStatistics | None, StackStatistics | None] | None:
    n_min = settings.min_stack_frames
    big_darks = [g for g in darks if len(g.files) >= n_min]
    big_flats = [(g, m) for g, m in zip(flats, levels) if len(g.files) >= n_min]
    if not big_darks:
        return None

    def planes(g: LevelGroup) -> Iterator[NDArray[Any]]:
        return (p for p, _ in _iter_planes(g.files, channel, roi))

    d_group = max(big_darks, key=lambda g: len(g.files))
    b_stack = None
    # The bright stack: the unsaturated flat stack nearest 50 % of saturation (section 8).
    lv = sorted(levels, key=lambda m: m.h)
    sat = find_saturation(
        [m.h for m in lv], [m.flat.mean_dn for m in lv],
        [m.flat.saturated_fraction for m in lv], [m.flat.temporal_variance_dn2 for m in lv],
        max_code=lv[0].flat.max_code,
        spatial_variance_dn2=[m.flat.spatial_variance_dn2 for m in lv],
        band=settings.saturation_band)
    y_sat = sat.mean_dn - lv[min(sat.index, len(lv) - 1)].dark.mean_dn
    big_flats = [(g, m) for g, m in big_flats
                 if m.flat.saturated_fraction < settings.saturation_band[0]
                 and m.flat.mean_dn > m.dark.mean_dn]
    if big_flats:
        g, m = min(big_flats,
                   key=lambda gm: abs(gm[1].flat.mean_dn - gm[1].dark.mean_dn - 0.5 * y_sat))
        b_stack = stack_statistics(planes(g), highpass=settings.highpass)
        same = [d for d in big_darks if d.exposure_s == g.exposure_s]
        d_group = same[0] if same else d_group
    return stack_statistics(planes(d_group), highpass=settings.highpass), b_stack


# ============================================================ plots and outputs
def write_camera_outputs(result: PhotonTransferResult, out_dir: str | Path) -> list[Path]:
    """Write camera.json, ptc.png, linearity.png and snr.png into ``out_dir`` (atomically).

    Returns
    -------
    list of Path
        The files written.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = ensure_dir(out_dir)
    written = []
    jpath = out / "camera.json"
    write_json_atomic(jpath, result.to_dict())
    written.append(jpath)
    tab = result.to_frame()
    k = result.gain_dn_per_e

    def save(fig: Any, name: str) -> None:
        p = out / name
        with atomic_write(p, "wb", encoding=None) as fh:
            fig.savefig(fh, format="png", dpi=110)
        plt.close(fig)
        written.append(p)

    # Photon transfer curve.
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    x = tab["mean_above_dark_dn"].to_numpy()
    y = tab["variance_above_dark_dn2"].to_numpy()
    used = tab["in_gain_fit"].to_numpy(bool)
    ax.plot(x[~used], y[~used], "o", mfc="none", color="0.5", label="levels not fitted")
    ax.plot(x[used], y[used], "o", color="C0", label="fit range 0-70 % of saturation")
    xx = np.linspace(0, max(float(np.max(x[used])), 1e-9), 50)
    ax.plot(xx, result.gain_fit_offset_dn2 + k * xx, "-", color="C3",
            label=f"K = {k:.4f} DN/e-")
    if result.saturation is not None:
        ax.axvline(result.saturation_above_dark_dn, color="C2", ls="--",
                   label="saturation (0.1-0.2 % at max)")
    ax.set_xlabel("mean grey value above dark  mu_y - mu_y.dark  (DN)")
    ax.set_ylabel("temporal variance above dark  (DN^2)")
    ax.set_title("Photon transfer (EMVA 1288)")
    ax.legend(fontsize=8)
    fig.tight_layout()
    save(fig, "ptc.png")

    # Linearity residuals.
    fig, ax = plt.subplots(figsize=(6.4, 4.0))
    if result.linearity is not None:
        le = result.linearity
        hh = tab["h"].to_numpy()
        ax.plot(hh[le.used], le.deviation_pct[le.used], "o-", color="C0")
        ax.axhline(0, color="0.3", lw=0.8)
        ax.set_title(f"Linearity deviation, LE = {le.le_pct:.3f} %")
    else:
        ax.set_title("Linearity deviation not computed (too few levels in 5-95 %)")
    ax.set_xlabel(f"exposure H ({result.h_unit})")
    ax.set_ylabel("deviation from the weighted line (%)")
    fig.tight_layout()
    save(fig, "linearity.png")

    # SNR against electrons.
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    mu_e = x / k
    snr = tab["snr"].to_numpy()
    unsat = tab["saturated_fraction"].to_numpy() < result.provenance.get(
        "settings", {}).get("saturation_band", (0.001, 0.002))[0]
    ok = (mu_e > 0) & np.isfinite(snr) & (snr > 0) & unsat
    ax.loglog(mu_e[ok], snr[ok], "o", color="C0", label="measured (Eq. 20), unsaturated levels")
    if ok.any():
        ee = np.geomspace(max(float(mu_e[ok].min()), 0.1), float(mu_e[ok].max()), 100)
        model = snr_model(ee, eta=1.0, gain_dn_per_e=k, dark_noise_e=result.dark_noise_e)
        ax.loglog(ee, model, "-", color="C3", label="linear model (Eq. 21)")
        ax.loglog(ee, np.sqrt(ee), ":", color="0.4", label="shot-noise limit sqrt(mu_e)")
    ax.set_xlabel("signal  mu_e  (electrons)")
    ax.set_ylabel("SNR")
    ax.set_title("Signal-to-noise ratio")
    ax.legend(fontsize=8)
    fig.tight_layout()
    save(fig, "snr.png")
    return written


# ============================================================ response curves
@dataclass(frozen=True, eq=False)
class ResponseCurve:
    """Inverse camera response recovered from an exposure bracket.

    Attributes
    ----------
    response : (256, C) ndarray of float64
        Relative linear light per 8-bit code, full scale 1.0 where the channel clips;
        monotone non-decreasing, at most 1, response[0] = 0 and response[255] = 1.
    opencv_response : (256, C) ndarray of float32
        OpenCV's output as returned (Debevec: resp[128] about 1).
    full_scale : (C,) ndarray
        Exposure (in OpenCV's units) at which each channel clips; response =
        opencv_response / full_scale, then made monotone with fixed end points.
    full_scale_method : tuple of str
        Per channel: ``"clip_threshold"`` (from clipped pixels) or ``"extrapolated"``.
    channels : tuple of str
    method : {"debevec", "robertson"}
    exposure_s : tuple of float
    samples : int
    smoothness : float
    provenance : dict
    """

    response: NDArray[np.float64] = field(repr=False)
    opencv_response: NDArray[np.float32] = field(repr=False)
    full_scale: NDArray[np.float64]
    full_scale_method: tuple[str, ...]
    channels: tuple[str, ...]
    method: str
    exposure_s: tuple[float, ...]
    samples: int
    smoothness: float
    provenance: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready): curves per channel name, scale and settings."""
        return {
            "channels": list(self.channels), "method": self.method,
            "response": {c: self.response[:, i].tolist() for i, c in enumerate(self.channels)},
            "opencv_response": {c: self.opencv_response[:, i].astype(float).tolist()
                                for i, c in enumerate(self.channels)},
            "full_scale": self.full_scale.tolist(),
            "full_scale_method": list(self.full_scale_method),
            "exposure_s": list(self.exposure_s), "samples": self.samples,
            "smoothness": self.smoothness, "provenance": self.provenance,
        }

    def to_frame(self) -> pd.DataFrame:
        """Table: code, then one column of relative linear light per channel."""
        df = pd.DataFrame({"code": np.arange(256)})
        for i, c in enumerate(self.channels):
            df[c] = self.response[:, i]
        return df


def _clip_threshold(x: NDArray[np.float64], clipped: NDArray[np.bool_]) -> float | None:
    """Exposure that best separates clipped from unclipped observations (fewest errors)."""
    if not clipped.any() or clipped.all():
        return None
    order = np.argsort(x, kind="stable")
    xs, cs = x[order], clipped[order]
    # errors when the threshold sits before position k: clipped below + unclipped at/after
    below = np.concatenate([[0], np.cumsum(cs)])
    after = np.concatenate([[0], np.cumsum(~cs[::-1])])[::-1]
    k = int(np.argmin(below + after))
    if k == 0:
        return float(xs[0])
    if k == xs.size:
        return float(xs[-1])
    return float(math.sqrt(xs[k - 1] * xs[k])) if xs[k - 1] > 0 else float(xs[k])


def _extrapolated_full_scale(g: NDArray[np.float64]) -> float:
    """log g fitted with a quadratic over codes 150-240, evaluated at 255 (fallback)."""
    z = np.arange(150, 241)
    coef = np.polyfit(z, np.log(np.maximum(g[z], 1e-30)), 2)
    return float(np.exp(np.polyval(coef, 255.0)))


def _validate_bracket(images: Sequence[ArrayLike], exposure_s: ArrayLike
                      ) -> tuple[list[NDArray[np.uint8]], NDArray[np.float32]]:
    imgs = [np.asarray(im) for im in images]
    if len(imgs) < 2:
        raise InputFormatError(f"a bracket needs at least 2 images, got {len(imgs)}")
    t = np.asarray(exposure_s, dtype=np.float64).ravel()
    if t.size != len(imgs):
        raise InputFormatError(f"{len(imgs)} images but {t.size} exposure times")
    if not np.all(np.isfinite(t)) or np.any(t <= 0):
        raise InputFormatError("exposure times must be positive numbers of seconds")
    if np.unique(t).size < 2:
        raise InputFormatError("all images of the bracket have the same exposure time")
    shape = imgs[0].shape
    for i, im in enumerate(imgs):
        if im.dtype != np.uint8:
            raise InputFormatError(
                f"image {i} is {im.dtype}; response recovery works on 8-bit images only "
                "(16-bit and raw data are linear already: use --transfer linear)")
        if im.shape != shape:
            raise ShapeMismatchError(
                f"image {i} is {_shape_text(im.shape)} but image 0 is {_shape_text(shape)}; "
                "a bracket must be one static scene at one size")
        if im.ndim not in (2, 3) or (im.ndim == 3 and im.shape[2] not in (1, 3)):
            raise InputFormatError(f"image {i} has shape {im.shape}; expected (H, W) or (H, W, 3)")
    return imgs, t.astype(np.float32)  # OpenCV asserts CV_32FC1 times


def recover_response(
    images: Sequence[ArrayLike], exposure_s: ArrayLike, *,
    method: Literal["debevec", "robertson"] = "debevec", samples: int = 150,
    smoothness: float = 10.0, channel_names: Sequence[str] | None = None,
) -> ResponseCurve:
    """Recover the inverse camera response of 8-bit images from an exposure bracket.

    OpenCV's Debevec-Malik (``cv2.createCalibrateDebevec``) or Robertson calibration gives
    g(code), the exposure producing each code, up to a scale. The scale is then fixed so
    that 1.0 is the exposure at which the channel clips: the radiance of every pixel is
    merged from the bracket (``cv2.createMergeDebevec``), each observation's exposure
    (radiance x t) is labelled clipped (code 255) or not, and the threshold that separates
    the two with the fewest errors is the full scale. When nothing clips, the full scale
    is extrapolated from a quadratic fit of log g over codes 150-240.

    Parameters
    ----------
    images : sequence of (H, W) or (H, W, 3) uint8 arrays
        The bracket (static scene), in any channel order; not modified.
    exposure_s : (n,) array_like
        Exposure times in seconds (converted to float32 for OpenCV).
    method : {"debevec", "robertson"}
        Robertson needs 3-channel images (OpenCV's implementation crashes on one channel).
    samples : int
        Debevec: number of sampled pixel positions (grid).
    smoothness : float
        Debevec: weight of the smoothness term (OpenCV's lambda).
    channel_names : sequence of str, optional
        Names of the channels (default red, green, blue; or luma for one channel).

    Raises
    ------
    InputFormatError, ShapeMismatchError
        Fewer than two images, not 8-bit, sizes differ, bad exposure times, or Robertson
        on one channel.
    """
    import cv2

    imgs, t = _validate_bracket(images, exposure_s)
    mono = imgs[0].ndim == 2 or imgs[0].shape[2] == 1
    if mono:
        imgs = [np.ascontiguousarray(im.reshape(im.shape[0], im.shape[1])) for im in imgs]
    else:
        imgs = [np.ascontiguousarray(im) for im in imgs]
    if method == "debevec":
        calib = cv2.createCalibrateDebevec(samples=int(samples), lambda_=float(smoothness))
    elif method == "robertson":
        if mono:
            raise InputFormatError("Robertson calibration needs 3-channel images (OpenCV's "
                                   "implementation fails on one channel); use debevec")
        calib = cv2.createCalibrateRobertson()
    else:
        raise InputFormatError(f"unknown response method {method!r}; use debevec or robertson")
    resp = np.asarray(calib.process(imgs, t), dtype=np.float32)  # (256, 1, C) or (256, 1)
    resp = resp.reshape(256, 1, -1)
    n_ch = resp.shape[2]
    resp2 = resp.reshape(256, n_ch)
    g = resp2.astype(np.float64)
    if not np.all(np.isfinite(g)) or np.any(g <= 0):
        raise InputFormatError(f"{method} response recovery returned invalid values; check "
                               "that the bracket covers dark to bright and the scene is static")
    merge_src = imgs if not mono else [np.ascontiguousarray(np.repeat(im[..., None], 3, axis=2))
                                       for im in imgs]
    merge_resp = resp if not mono else np.ascontiguousarray(np.repeat(resp, 3, axis=2))
    radiance = np.asarray(cv2.createMergeDebevec().process(merge_src, t, merge_resp), np.float64)
    full = np.empty(n_ch)
    how: list[str] = []
    for c in range(n_ch):
        rad_c = radiance[..., c]
        x = np.concatenate([(rad_c * float(ti)).ravel() for ti in t])
        cl = np.concatenate([((im if mono else im[..., c]) == 255).ravel() for im in imgs])
        ok = np.isfinite(x) & (x > 0)
        thr = _clip_threshold(x[ok], cl[ok])
        if thr is None:
            full[c] = _extrapolated_full_scale(g[:, c])
            how.append("extrapolated")
        else:
            full[c] = thr
            how.append("clip_threshold")
    # Monotone, and capped at full scale: by the definition of the clip threshold every
    # unclipped code lies below it (the top codes are the least constrained by the fit).
    norm = np.minimum(np.maximum.accumulate(g / full, axis=0), 1.0)
    norm[0, :] = 0.0
    norm[255, :] = 1.0
    names = tuple(channel_names) if channel_names else (
        ("luma",) if n_ch == 1 else ("red", "green", "blue"))
    if len(names) != n_ch:
        raise InputFormatError(f"{len(names)} channel names for {n_ch} channels")
    return ResponseCurve(
        response=norm, opencv_response=resp2, full_scale=full, full_scale_method=tuple(how),
        channels=names, method=method, exposure_s=tuple(float(v) for v in t),
        samples=int(samples), smoothness=float(smoothness),
        provenance={"function": "recover_response", "opencv_version": cv2.__version__,
                    "ecl_quant_version": __version__, "n_images": len(imgs),
                    "image_shape": list(imgs[0].shape)},
    )


@dataclass(frozen=True, eq=False)
class DeviceProfile:
    """Measured transfer curve of a device (``--transfer profile=FILE``).

    Attributes
    ----------
    response : dict of str -> (256,) ndarray
        Keys red, green, blue, luma: relative linear light per 8-bit code, 0 at code 0,
        1.0 (full scale) at code 255.
    make, model : str or None
        Device metadata (EXIF Make/Model when present).
    created : str
        ISO 8601 date and time of creation (UTC).
    method : str
    measured_channels : tuple of str
        Channels recovered from data (the others copy the luma curve of a grey bracket).
    exposure_s : tuple of float
    sources : tuple of str
        Files of the bracket.
    provenance : dict
    """

    response: dict[str, NDArray[np.float64]] = field(repr=False)
    make: str | None
    model: str | None
    created: str
    method: str
    measured_channels: tuple[str, ...]
    exposure_s: tuple[float, ...]
    sources: tuple[str, ...] = ()
    provenance: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """The JSON document (schema ``ecl_quant.device_profile`` version 1)."""
        return {
            "schema": PROFILE_SCHEMA_ID,
            "version": PROFILE_VERSION,
            "normalisation": "full scale 1.0 at the clipping exposure; code 0 -> 0, code 255 -> 1",
            "bit_depth": 8,
            "response": {c: [float(v) for v in self.response[c]] for c in PROFILE_CHANNELS},
            "measured_channels": list(self.measured_channels),
            "device": {"make": self.make, "model": self.model},
            "created": self.created,
            "method": self.method,
            "exposure_s": list(self.exposure_s),
            "sources": list(self.sources),
            "provenance": self.provenance,
        }

    def linearize(self, codes: ArrayLike, channel: str = "luma") -> NDArray[np.float32]:
        """Codes (0..255, integer or fractional) -> linear full-scale light, float32.

        Fractional codes (averages) are interpolated linearly between table entries.
        """
        if channel not in self.response:
            raise InputFormatError(f"the profile has no {channel!r} channel; use one of "
                                   f"{', '.join(PROFILE_CHANNELS)}")
        lut = self.response[channel]
        c = np.asarray(codes)
        if np.issubdtype(c.dtype, np.integer):
            return lut[np.clip(c, 0, 255)].astype(np.float32)
        return np.interp(c.astype(np.float64), np.arange(256), lut).astype(np.float32)


def _luma_codes(img: NDArray[np.uint8]) -> NDArray[np.uint8]:
    y = img.astype(np.float32) @ _LUMA_WEIGHTS.astype(np.float32)
    return np.clip(np.rint(y), 0, 255).astype(np.uint8)


def make_profile(curve: ResponseCurve, *, luma: ResponseCurve | None = None,
                 make: str | None = None, model: str | None = None,
                 sources: Sequence[str] = ()) -> DeviceProfile:
    """Build a device profile from a recovered response (and an optional luma curve).

    A 3-channel curve fills red/green/blue; luma comes from ``luma`` (the bracket's
    Rec. 709 Y') or, when absent, the Rec. 709-weighted mean of the three curves. A
    1-channel (grey) curve fills all four keys.
    """
    resp: dict[str, NDArray[np.float64]] = {}
    if curve.response.shape[1] == 3:
        for i, c in enumerate(("red", "green", "blue")):
            resp[c] = curve.response[:, i].copy()
        if luma is not None:
            resp["luma"] = luma.response[:, 0].copy()
            measured = ("red", "green", "blue", "luma")
        else:
            resp["luma"] = curve.response @ _LUMA_WEIGHTS
            measured = ("red", "green", "blue")
    else:
        for c in PROFILE_CHANNELS:
            resp[c] = curve.response[:, 0].copy()
        measured = ("luma",)
    return DeviceProfile(
        response=resp, make=make, model=model,
        created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        method=curve.method, measured_channels=measured, exposure_s=curve.exposure_s,
        sources=tuple(str(s) for s in sources),
        provenance={**curve.provenance, "samples": curve.samples,
                    "smoothness": curve.smoothness,
                    "full_scale_method": list(curve.full_scale_method),
                    "opencv_full_scale": [float(v) for v in curve.full_scale]},
    )


def _profile_schema() -> dict[str, Any]:
    text = resources.files("ecl_quant").joinpath("schemas/device_profile.schema.json").read_text(
        encoding="utf-8")
    return json.loads(text)


def save_profile(profile: DeviceProfile, path: str | Path) -> Path:
    """Validate against the schema and write the profile JSON atomically."""
    import jsonschema

    doc = profile.to_dict()
    jsonschema.validate(doc, _profile_schema())
    path = Path(path)
    if path.parent and not path.parent.exists():
        ensure_dir(path.parent)
    write_json_atomic(path, doc)
    return path


def load_profile(path: str | Path) -> DeviceProfile:
    """Read and validate a device profile JSON.

    Raises
    ------
    InputFormatError
        Missing file, not JSON, or not a valid ``ecl_quant.device_profile``.
    """
    import jsonschema

    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except OSError as err:
        raise InputFormatError(f"cannot read the device profile ({err.strerror})",
                               path=path) from err
    except (ValueError, UnicodeDecodeError) as err:
        raise InputFormatError(f"the device profile is not valid JSON ({err}); make one with "
                               "`ecl-quant camera --bracket`", path=path) from err
    try:
        jsonschema.validate(doc, _profile_schema())
    except jsonschema.ValidationError as err:
        where = "/".join(str(p) for p in err.absolute_path) or "top level"
        raise InputFormatError(f"not a valid device profile ({where}: {err.message}); make one "
                               "with `ecl-quant camera --bracket`", path=path) from err
    dev = doc.get("device") or {}
    return DeviceProfile(
        response={c: np.asarray(doc["response"][c], dtype=np.float64) for c in PROFILE_CHANNELS},
        make=dev.get("make"), model=dev.get("model"), created=doc.get("created", ""),
        method=doc.get("method", ""), measured_channels=tuple(doc.get("measured_channels", ())),
        exposure_s=tuple(doc.get("exposure_s", ())), sources=tuple(doc.get("sources", ())),
        provenance=doc.get("provenance", {}),
    )


def _parse_exposures(text: str | Sequence[float]) -> list[float]:
    if not isinstance(text, str):
        return [float(v) for v in text]
    out = []
    for part in text.replace(";", ",").split(","):
        p = part.strip()
        if not p:
            continue
        try:
            if "/" in p:
                num, den = p.split("/", 1)
                out.append(float(num) / float(den))
            else:
                out.append(float(p))
        except (ValueError, ZeroDivisionError):
            raise InputFormatError(f"--exposures: {p!r} is not a time in seconds (e.g. 1/60 "
                                   "or 0.0167)") from None
    return out


def read_bracket(folder: str | Path, *, exposures: str | Sequence[float] | None = None,
                 ) -> tuple[list[NDArray[np.uint8]], list[float], list[Path],
                            tuple[str | None, str | None]]:
    """Read an exposure bracket (8-bit stills) from a folder.

    Parameters
    ----------
    folder : str or Path
        Images of one static scene (sorted by name).
    exposures : str or sequence of float, optional
        Exposure times in seconds in file-name order ("1/60,1/30,..."); default: EXIF
        ExposureTime of each file.

    Returns
    -------
    images, exposure_s, files, (make, model)

    Raises
    ------
    InputFormatError
        No images, a count mismatch, or no exposure metadata and no ``exposures``.
    """
    from .frames import iter_frames, read_exif

    folder = Path(folder)
    if not folder.is_dir():
        raise InputFormatError("not a folder; give the folder of bracket images", path=folder)
    files = _image_files(folder)
    if len(files) < 2:
        raise InputFormatError(f"{len(files)} image(s) found; a bracket needs at least 2",
                               path=folder)
    if exposures is not None:
        t = _parse_exposures(exposures)
        if len(t) != len(files):
            raise InputFormatError(f"--exposures lists {len(t)} times but the folder has "
                                   f"{len(files)} images", path=folder)
    else:
        t = []
        for f in files:
            e = read_exif(f).exposure_s
            if e is None:
                raise InputFormatError(
                    f"{f.name} has no EXIF ExposureTime; give the times with --exposures "
                    "(seconds, in file-name order)", path=folder)
            t.append(float(e))
    images: list[NDArray[np.uint8]] = []
    for fr in iter_frames([str(f) for f in files], fps=1.0, sort=False):
        if fr.data.dtype != np.uint8:
            raise InputFormatError(
                f"{Path(fr.source).name} is {fr.data.dtype}; response curves are for 8-bit "
                "gamma-encoded stills", path=fr.source)
        images.append(np.asarray(fr.data))
    info = read_exif(files[0])
    return images, t, files, (info.make, info.model)


def profile_from_bracket(
    images: Sequence[ArrayLike], exposure_s: ArrayLike, *,
    method: Literal["debevec", "robertson"] = "debevec", samples: int = 150,
    smoothness: float = 10.0, make: str | None = None, model: str | None = None,
    sources: Sequence[str] = (),
) -> DeviceProfile:
    """Recover the colour (and luma) response of a bracket and build its device profile."""
    imgs = [np.asarray(im) for im in images]
    curve = recover_response(imgs, exposure_s, method=method, samples=samples,
                             smoothness=smoothness)
    luma = None
    if curve.response.shape[1] == 3:
        lum_imgs = [_luma_codes(im) for im in imgs]
        if method == "robertson":
            # OpenCV's Robertson handles 3 channels only: run it on Y' repeated three times.
            rep = [np.repeat(y[..., None], 3, axis=2) for y in lum_imgs]
            c3 = recover_response(rep, exposure_s, method="robertson")
            luma = ResponseCurve(
                response=c3.response[:, :1], opencv_response=c3.opencv_response[:, :1],
                full_scale=c3.full_scale[:1], full_scale_method=c3.full_scale_method[:1],
                channels=("luma",), method="robertson", exposure_s=c3.exposure_s,
                samples=c3.samples, smoothness=c3.smoothness, provenance=c3.provenance)
        else:
            luma = recover_response(lum_imgs, exposure_s, method=method, samples=samples,
                                    smoothness=smoothness)
    return make_profile(curve, luma=luma, make=make, model=model, sources=sources)
