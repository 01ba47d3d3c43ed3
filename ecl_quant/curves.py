"""Streaming spot integration and figures of merit of emission curves.

Two parts, both pure numpy (frames are read by :mod:`ecl_quant.measure`):

* :class:`SpotIntegrator` turns linear crops, one per frame, into per-spot sums with the
  precomputed weight cutouts of :mod:`ecl_quant.spots` (one gather + ``np.bincount`` per
  frame, no per-pixel Python loop), a sigma-clipped background (median/MAD clipping, then
  the mean or median of the kept pixels) from each spot's annulus, saturated pixel counts, and the statistics for a noise model estimated from
  the recording itself (temporal second differences).
* :func:`curve_metrics` reduces one spot's net signal against time to baseline, peak
  (Savitzky-Golay smoothing, then a weighted local polynomial on the true timestamps), time to
  peak, onset, FWHM, time above the onset threshold, integral (trapezoid on the true
  timestamps, baseline removed) with its standard error, SNR and flags.

Noise model
-----------
Per-pixel variance of a linear value L (full-scale units, per frame):
``var = read_var + L / gain`` (EMVA 1288 linear model: read noise plus shot noise with
``gain`` electrons per full scale). A spot sum ``sum_i w_i L_i`` has variance
``sum_i w_i**2 var_i`` (the aperture-photometry formula); the background (clipped mean
of ``n`` annulus pixels of spread ``s``) adds ``area**2 * s**2 / n``.

References
----------
Savitzky, A. and Golay, M. J. E. (1964), Smoothing and differentiation of data by
simplified least squares procedures, Anal. Chem. 36, 1627.
EMVA Standard 1288, Release 4.0 Linear (2021), eqs. (14)-(15).
Stetson, P. B. (1987), PASP 99, 191 (sky annulus, robust sky).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from . import _jit
from .errors import SpotError
from .spots import Cutout, SpotSet, annulus_cutout, region_cutout, spot_cutout

__all__ = [
    "FLAG_WORDS",
    "CurveSettings",
    "CurveMetrics",
    "NoiseModel",
    "trapezoid_weights",
    "integrate_curve",
    "smooth_curve",
    "locate_peak",
    "onset_time",
    "crossing_width",
    "curve_metrics",
    "estimate_noise_model",
    "SpotIntegrator",
]

FLAG_WORDS = ("saturated", "drifted", "low_snr", "no_pulse", "exposure_changed")
_MAD_TO_SD = 1.482602218505602  # 1 / Phi^-1(3/4), normal distribution


# ------------------------------------------------------------------ figures of merit


@dataclass(frozen=True)
class CurveSettings:
    """Options of :func:`curve_metrics`.

    Attributes
    ----------
    baseline_end_s : float or None
        Frames with ``time_s <= baseline_end_s`` are the pre-emission baseline. None:
        automatic (see :func:`curve_metrics`).
    onset_k_sigma : float
        Onset threshold = baseline + k x baseline SD.
    onset_min_frames : int
        The signal must stay above the threshold this many frames in a row.
    smooth_frames : int or None
        Savitzky-Golay window (odd, frames); None: chosen from the pulse width.
    smooth_order : int
        Savitzky-Golay polynomial order.
    min_snr : float
        ``low_snr`` below this integral SNR.
    end_fraction : float
        ``pulse_not_ended`` when the smoothed signal at the last frame is still above
        this fraction of the peak height (the integral then misses the rest of the
        pulse: for a first-order decay the missing area is that fraction of the peak
        times the decay time).
    """

    baseline_end_s: float | None = None
    onset_k_sigma: float = 4.0
    onset_min_frames: int = 3
    smooth_frames: int | None = None
    smooth_order: int = 2
    min_snr: float = 3.0
    end_fraction: float = 0.1


@dataclass(frozen=True)
class CurveMetrics:
    """Figures of merit of one emission curve (units of the signal: S; of time: s).

    Attributes
    ----------
    baseline, baseline_sd : float
        Mean and SD of the signal over the baseline frames (S).
    baseline_frames : int
    peak, peak_se : float
        Peak height above baseline and its standard error (S); NaN when saturated.
    peak_raw : float
        Peak height even when saturated.
    time_to_peak_s, time_to_peak_se_s : float
        Time of the peak from the first frame, and its standard error.
    onset_s : float
        First crossing of baseline + k sigma (held for ``onset_min_frames``); NaN
        without a pulse.
    fwhm_s : float
        Full width at half maximum (NaN when the curve does not fall to half on both
        sides within the recording).
    fwhm_left_s, fwhm_right_s : float
        The two half-maximum crossing times.
    time_above_s : float
        Duration of the span around the peak above the onset threshold (NaN when it is
        not closed within the recording).
    integral, integral_se : float
        Trapezoid integral of (signal - baseline) over the recording (S x s) and its
        standard error; NaN when saturated.
    integral_raw : float
        The integral even when saturated (not valid then).
    snr : float
        ``integral / integral_se``.
    peak_snr : float
        ``peak_raw / baseline_sd``.
    noise_ratio : float
        Observed baseline SD over the model standard error (about 1 when the noise
        model is right).
    saturated_frames : int
    flags : tuple of str
    """

    baseline: float
    baseline_sd: float
    baseline_frames: int
    peak: float
    peak_se: float
    peak_raw: float
    time_to_peak_s: float
    time_to_peak_se_s: float
    onset_s: float
    fwhm_s: float
    fwhm_left_s: float
    fwhm_right_s: float
    time_above_s: float
    integral: float
    integral_se: float
    integral_raw: float
    snr: float
    peak_snr: float
    noise_ratio: float
    saturated_frames: int
    flags: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Fields as a dict, flags joined with ';'."""
        d = asdict(self)
        d["flags"] = ";".join(self.flags)
        return d


def trapezoid_weights(time_s: ArrayLike) -> NDArray[np.float64]:
    """Weights c with ``sum(c * y) == trapezoid(y, time_s)`` for any y.

    ``c_0 = (t_1 - t_0)/2``, ``c_i = (t_{i+1} - t_{i-1})/2``, ``c_n = (t_n - t_{n-1})/2``.
    """
    t = np.asarray(time_s, dtype=np.float64)
    c = np.zeros_like(t)
    if t.size < 2:
        return c
    dt = np.diff(t)
    c[:-1] += dt / 2.0
    c[1:] += dt / 2.0
    return c


def integrate_curve(time_s: ArrayLike, signal: ArrayLike, signal_se: ArrayLike,
                    baseline_mask: ArrayLike) -> tuple[float, float, float]:
    """Trapezoid integral of (signal - baseline) on the true timestamps, with its SE.

    The baseline b is the mean of ``signal`` over ``baseline_mask``. The integral is
    ``I = sum_i c_i (S_i - b) = sum_i a_i S_i`` with ``a_i = c_i - T [i in B] / n_B``
    (``c`` the trapezoid weights, ``T = sum c``), so its variance with independent
    per-frame errors is ``sum_i a_i**2 se_i**2``: the shared baseline estimate's
    correlation with every frame is included.

    Returns
    -------
    integral, integral_se, baseline : float
        In units of signal x s.
    """
    t = np.asarray(time_s, dtype=np.float64)
    s = np.asarray(signal, dtype=np.float64)
    se = np.asarray(signal_se, dtype=np.float64)
    base = np.asarray(baseline_mask, dtype=bool)
    c = trapezoid_weights(t)
    n_b = int(base.sum())
    b = float(s[base].mean()) if n_b else 0.0
    a = c - (c.sum() * base / n_b if n_b else 0.0)
    integral = float(np.dot(a, s))
    se_sum = float(np.sqrt(np.dot(a * a, se * se)))
    return integral, se_sum, b


def _savgol_fit_matrix(window: int, order: int, positions: NDArray[np.float64]) -> NDArray[np.float64]:
    """Rows giving the least-squares polynomial value at ``positions`` from a window."""
    x = np.arange(window, dtype=np.float64) - (window - 1) / 2.0
    vander = np.vander(x, order + 1, increasing=True)  # (window, order + 1)
    pinv = np.linalg.pinv(vander)  # (order + 1, window)
    return np.vander(positions, order + 1, increasing=True) @ pinv  # (len(positions), window)


def smooth_curve(signal: ArrayLike, *, window: int, order: int = 2) -> NDArray[np.float64]:
    """Savitzky-Golay smoothing: a least-squares polynomial of ``order`` in a sliding window.

    Interior points take the fitted value at the window centre (the classic convolution
    coefficients); the first and last ``window // 2`` points take the value of the
    polynomial fitted to the first / last window, as ``scipy.signal.savgol_filter(...,
    mode="interp")`` does. The window is made odd and shrunk to the curve length;
    curves shorter than ``order + 2`` frames are returned unchanged.
    """
    y = np.asarray(signal, dtype=np.float64)
    n = y.size
    w = int(window) | 1
    if w > n:
        w = n if n % 2 else n - 1
    if w <= order or n < order + 2:
        return y.copy()
    half = w // 2
    centre = _savgol_fit_matrix(w, order, np.array([0.0]))[0]
    out = np.empty(n)
    out[half:n - half] = np.convolve(y, centre[::-1], mode="valid")
    edge = _savgol_fit_matrix(w, order, np.arange(w, dtype=np.float64) - half)
    out[:half] = edge[:half] @ y[:w]
    out[n - half:] = edge[w - half:] @ y[n - w:]
    return out


def locate_peak(time_s: ArrayLike, signal: ArrayLike, signal_se: ArrayLike, *,
                smoothed: ArrayLike, baseline: float = 0.0, level: float = 0.7,
                degree: int = 4) -> tuple[float, float, float, float]:
    """Peak time and value from a local polynomial around the smoothed maximum.

    The raw points of the contiguous run around the maximum of ``smoothed`` where
    ``smoothed`` stays above ``baseline + level * (max - baseline)`` are fitted by
    weighted least squares (weights ``1/se**2``) with a polynomial in time (true
    timestamps) of ``degree`` (lowered to fit the number of points, at least 2: a
    parabola). A parabola is biased towards the slow side of an asymmetric ECL pulse
    (fast rise, slow decay); the quartic follows the asymmetry. The peak is the
    polynomial's maximum inside the run; its standard errors come from the coefficient
    covariance (scaled by the reduced chi-square when above 1) by the delta method:
    ``dt*/dc_j = -j t*^(j-1) / p''(t*)`` and ``dp(t*)/dc_j = t*^j``. When no interior
    maximum exists the smoothed maximum is returned with the frame interval as the time
    uncertainty.

    Returns
    -------
    time_s, value, time_se_s, value_se : float
    """
    t = np.asarray(time_s, dtype=np.float64)
    y = np.asarray(signal, dtype=np.float64)
    se = np.asarray(signal_se, dtype=np.float64)
    sm = np.asarray(smoothed, dtype=np.float64)
    k = int(np.nanargmax(sm))
    cut = baseline + level * (sm[k] - baseline)
    lo = k
    while lo > 0 and sm[lo - 1] >= cut:
        lo -= 1
    hi = k
    while hi < t.size - 1 and sm[hi + 1] >= cut:
        hi += 1
    hi += 1
    if hi - lo < 5:  # too few points above the level: widen to 5 around the maximum
        lo, hi = max(0, k - 2), min(t.size, k + 3)
    dt_local = float(np.median(np.diff(t[max(0, k - 2):k + 3]))) if t.size > 1 else 0.0
    fallback = (float(t[k]), float(sm[k]), dt_local, float(se[k]))
    npts = hi - lo
    deg = int(min(degree, npts - 3))
    if deg < 2:
        return fallback
    scale = max(float(t[hi - 1] - t[lo]), 1e-9)
    u = (t[lo:hi] - t[k]) / scale  # scaled for a well-conditioned Vandermonde matrix
    w = 1.0 / np.maximum(se[lo:hi], 1e-30) ** 2
    X = np.vander(u, deg + 1, increasing=True)
    sw = np.sqrt(w)
    try:
        coef, *_ = np.linalg.lstsq(X * sw[:, None], y[lo:hi] * sw, rcond=None)
        cov = np.linalg.inv((X * w[:, None]).T @ X)
    except np.linalg.LinAlgError:
        return fallback
    dof = npts - deg - 1
    if dof > 0:
        chi2 = float(np.sum(w * (y[lo:hi] - X @ coef) ** 2)) / dof
        cov = cov * max(1.0, chi2)
    p = np.polynomial.Polynomial(coef)
    dp, d2p = p.deriv(1), p.deriv(2)
    roots = dp.roots()
    roots = roots[np.isreal(roots)].real
    roots = roots[(roots >= u[0]) & (roots <= u[-1]) & (d2p(roots) < 0)]
    if roots.size == 0:
        return fallback
    u_pk = float(roots[np.argmax(p(roots))])
    j = np.arange(deg + 1, dtype=np.float64)
    g_u = -(j * np.where(j > 0, u_pk ** np.maximum(j - 1, 0), 0.0)) / float(d2p(u_pk))
    g_v = u_pk**j
    t_se = float(np.sqrt(max(g_u @ cov @ g_u, 0.0))) * scale
    v_se = float(np.sqrt(max(g_v @ cov @ g_v, 0.0)))
    return float(t[k] + u_pk * scale), float(p(u_pk)), t_se, v_se


def onset_time(time_s: ArrayLike, signal: ArrayLike, threshold: float, *,
               min_frames: int = 3) -> float:
    """First time the signal rises above ``threshold`` and stays there ``min_frames``.

    Linear interpolation between the last frame below and the first above; NaN when
    there is no such run; the first frame's time when the run starts there.
    """
    t = np.asarray(time_s, dtype=np.float64)
    y = np.asarray(signal, dtype=np.float64)
    above = y > threshold
    m = max(1, int(min_frames))
    if above.size < m:
        return math.nan
    run = np.convolve(above.astype(np.int32), np.ones(m, np.int32), mode="valid") == m
    idx = np.flatnonzero(run)
    if idx.size == 0:
        return math.nan
    i = int(idx[0])
    if i == 0:
        return float(t[0])
    y0, y1 = y[i - 1], y[i]
    frac = (threshold - y0) / (y1 - y0) if y1 != y0 else 1.0
    return float(t[i - 1] + np.clip(frac, 0.0, 1.0) * (t[i] - t[i - 1]))


def crossing_width(time_s: ArrayLike, curve: ArrayLike, level: float, peak_index: int
                   ) -> tuple[float, float]:
    """Times where ``curve`` crosses ``level`` just before and after ``peak_index``.

    Linear interpolation on the true timestamps. NaN for a side where the curve does
    not go below ``level`` within the recording.

    Returns
    -------
    left_s, right_s : float
    """
    t = np.asarray(time_s, dtype=np.float64)
    y = np.asarray(curve, dtype=np.float64)
    below = y <= level
    left = right = math.nan
    lb = np.flatnonzero(below[:peak_index])
    if lb.size:
        i = int(lb[-1])
        y0, y1 = y[i], y[i + 1]
        frac = (level - y0) / (y1 - y0) if y1 != y0 else 0.0
        left = float(t[i] + np.clip(frac, 0, 1) * (t[i + 1] - t[i]))
    rb = np.flatnonzero(below[peak_index + 1:])
    if rb.size:
        j = peak_index + 1 + int(rb[0])
        y0, y1 = y[j - 1], y[j]
        frac = (y0 - level) / (y0 - y1) if y1 != y0 else 1.0
        right = float(t[j - 1] + np.clip(frac, 0, 1) * (t[j] - t[j - 1]))
    return left, right


def _baseline_mask(t: NDArray[np.float64], end_s: float | None) -> NDArray[np.bool_]:
    if end_s is not None:
        mask = t <= end_s
    else:
        n0 = max(3, int(math.ceil(0.05 * t.size)))
        mask = np.zeros(t.size, bool)
        mask[:n0] = True
    if mask.sum() < 2 and t.size >= 2:
        mask = np.zeros(t.size, bool)
        mask[:2] = True
    return mask


def curve_metrics(time_s: ArrayLike, signal: ArrayLike, signal_se: ArrayLike, *,
                  saturated_px: ArrayLike | None = None,
                  settings: CurveSettings = CurveSettings()) -> CurveMetrics:
    """Figures of merit of one spot's net signal against time.

    Baseline: the frames up to ``settings.baseline_end_s``; when None, the first 5 % of
    the frames (at least 3), refined once to the frames before the onset found with it.
    Onset: :func:`onset_time` at baseline + k x baseline SD (the SD falls back to the
    median model SE with fewer than 3 baseline frames). Peak: located on the
    Savitzky-Golay smoothed curve (window about half the frames above half maximum,
    5..51), refined by a local polynomial fit on the true timestamps
    (:func:`locate_peak`). FWHM and time above
    the onset threshold: :func:`crossing_width` on the smoothed curve. Integral:
    :func:`integrate_curve`. Saturated frames (any saturated aperture pixel) make the
    peak and integral NaN (kept in ``peak_raw``/``integral_raw``) and add ``saturated``.

    Parameters
    ----------
    time_s : (n,) array_like of float
        True frame times, s, increasing.
    signal, signal_se : (n,) array_like of float
        Net spot signal and its standard error per frame.
    saturated_px : (n,) array_like of int, optional
        Saturated aperture pixels per frame.
    settings : CurveSettings

    Returns
    -------
    CurveMetrics
    """
    t = np.asarray(time_s, dtype=np.float64)
    y = np.asarray(signal, dtype=np.float64)
    se = np.asarray(signal_se, dtype=np.float64)
    n = t.size
    sat = (np.zeros(n, np.int64) if saturated_px is None
           else np.asarray(saturated_px, dtype=np.int64))
    if not (y.size == se.size == sat.size == n):
        raise SpotError("time, signal, signal_se and saturated_px must have the same length")
    nan = math.nan
    if n == 0:
        return CurveMetrics(nan, nan, 0, nan, nan, nan, nan, nan, nan, nan, nan, nan, nan,
                            nan, nan, nan, nan, nan, nan, 0, ("no_pulse",))
    k = settings.onset_k_sigma

    def base_stats(mask: NDArray[np.bool_]) -> tuple[float, float]:
        vals = y[mask]
        b = float(vals.mean())
        sd = float(vals.std(ddof=1)) if vals.size >= 3 else float(np.median(se[mask]))
        return b, sd

    mask = _baseline_mask(t, settings.baseline_end_s)
    b, sd = base_stats(mask)
    onset = onset_time(t, y, b + k * sd, min_frames=settings.onset_min_frames)
    if settings.baseline_end_s is None and math.isfinite(onset):
        refined = t < onset
        refined[np.flatnonzero(refined)[-1:]] = False  # one frame of guard before the onset
        if refined.sum() >= 3:
            mask = refined
            b, sd = base_stats(mask)
            onset = onset_time(t, y, b + k * sd, min_frames=settings.onset_min_frames)
    model_se = float(np.sqrt(np.mean(se[mask] ** 2))) if mask.any() else nan
    noise_ratio = sd / model_se if model_se > 0 else nan
    thr = b + k * sd

    # Smoothing window: about half the number of frames above half maximum (5..51).
    pre = smooth_curve(y, window=5, order=settings.smooth_order)
    if settings.smooth_frames is not None:
        window = int(settings.smooth_frames)
    else:
        above_half = int(np.sum(pre - b > 0.5 * (np.max(pre) - b))) if n else 0
        window = int(np.clip(above_half // 2, 5, 51))
    sm = smooth_curve(y, window=window, order=settings.smooth_order)
    t_pk, v_pk, t_pk_se, v_pk_se = locate_peak(t, y, se, smoothed=sm, baseline=b)
    k_pk = int(np.argmax(sm))
    peak_raw = v_pk - b
    # The peak SE includes the baseline mean's error (its SD / sqrt(n_baseline)).
    peak_se = math.sqrt(v_pk_se**2 + (sd**2 / max(int(mask.sum()), 1)))
    left, right = crossing_width(t, sm, b + 0.5 * (sm[k_pk] - b), k_pk)
    fwhm = right - left if math.isfinite(left) and math.isfinite(right) else nan
    if math.isfinite(onset):
        l2, r2 = crossing_width(t, sm, thr, k_pk)
        if not math.isfinite(l2):
            l2 = float(t[0]) if sm[0] > thr else nan
        time_above = r2 - l2 if math.isfinite(l2) and math.isfinite(r2) else nan
    else:
        time_above = nan
    integral_raw, integral_se, _ = integrate_curve(t, y, se, mask)
    n_sat = int(np.count_nonzero(sat > 0))
    flags: list[str] = []
    if n_sat:
        flags.append("saturated")
    snr = integral_raw / integral_se if integral_se > 0 else nan
    if not math.isfinite(onset):
        flags.append("no_pulse")
    if not (snr >= settings.min_snr):
        flags.append("low_snr")
    height = float(sm[k_pk]) - b
    if math.isfinite(onset) and height > 0 and float(sm[-1]) - b > settings.end_fraction * height:
        flags.append("pulse_not_ended")
    saturated = n_sat > 0
    return CurveMetrics(
        baseline=b, baseline_sd=sd, baseline_frames=int(mask.sum()),
        peak=nan if saturated else peak_raw, peak_se=nan if saturated else peak_se,
        peak_raw=peak_raw, time_to_peak_s=t_pk, time_to_peak_se_s=t_pk_se,
        onset_s=onset, fwhm_s=fwhm, fwhm_left_s=left, fwhm_right_s=right,
        time_above_s=time_above,
        integral=nan if saturated else integral_raw,
        integral_se=nan if saturated else integral_se, integral_raw=integral_raw,
        snr=nan if saturated else snr, peak_snr=peak_raw / sd if sd > 0 else nan,
        noise_ratio=noise_ratio, saturated_frames=n_sat, flags=tuple(flags))


# ------------------------------------------------------------------ noise model


@dataclass(frozen=True)
class NoiseModel:
    """Per-pixel variance ``read_var + level / gain`` in linear full-scale units.

    Attributes
    ----------
    read_var : float
        Variance at zero level, FS^2 (read noise^2; without a dark frame also what the
        dark offset contributes).
    gain : float
        Electrons per full scale (inf when the shot noise could not be resolved).
    source : str
        ``"given"`` or a description of the estimate.
    n_points : int
        Observations the estimate used.
    """

    read_var: float
    gain: float
    source: str
    n_points: int = 0

    @property
    def slope(self) -> float:
        """1 / gain."""
        return 0.0 if not math.isfinite(self.gain) or self.gain <= 0 else 1.0 / self.gain

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly fields."""
        return {"read_var": self.read_var, "gain_e_per_fs": self.gain
                if math.isfinite(self.gain) else None, "source": self.source,
                "n_points": self.n_points}


def estimate_noise_model(level: ArrayLike, variance: ArrayLike, weight: ArrayLike, *,
                         clip_sigma: float = 4.0, min_range: float = 5.0) -> NoiseModel:
    """Fit ``variance = read_var + level / gain`` to (level, variance) observations.

    Weighted least squares (weights: pixels per observation divided by the squared
    predicted variance, the inverse variance of a sample variance), iterated three times
    with observations more than ``clip_sigma`` robust SDs of the normalised residual
    away dropped (drift residuals and hot pixels raise single observations). When the
    levels span less than ``min_range`` times the smallest level's noise SD the slope is
    not resolved: only the mean variance is kept (``gain = inf``).

    Returns
    -------
    NoiseModel
    """
    x = np.asarray(level, dtype=np.float64)
    v = np.asarray(variance, dtype=np.float64)
    n = np.asarray(weight, dtype=np.float64)
    ok = np.isfinite(x) & np.isfinite(v) & (n > 1) & (v >= 0)
    x, v, n = x[ok], v[ok], n[ok]
    if x.size == 0:
        return NoiseModel(0.0, math.inf, "estimate failed: no usable frames", 0)
    keep = np.ones(x.size, bool)
    a, s = float(np.median(v)), 0.0
    for _ in range(4):
        xs, vs, ns = x[keep], v[keep], n[keep]
        pred = np.maximum(a + s * xs, 1e-30)
        w = ns / pred**2
        spread = xs.max() - xs.min()
        if spread > min_range * math.sqrt(max(a, 1e-30)):
            X = np.column_stack([np.ones_like(xs), xs])
            sw = np.sqrt(w)
            coef, *_ = np.linalg.lstsq(X * sw[:, None], vs * sw, rcond=None)
            a, s = float(coef[0]), float(coef[1])
            if s < 0:
                s = 0.0
                a = float(np.sum(w * vs) / np.sum(w))
            if a < 0:
                a = 0.0
                s = float(np.sum(w * xs * vs) / np.sum(w * xs * xs))
        else:
            a, s = float(np.sum(w * vs) / np.sum(w)), 0.0
        pred = np.maximum(a + s * x, 1e-30)
        z = (v - pred) / (pred * np.sqrt(2.0 / n))
        zk = z[keep]
        scale = _MAD_TO_SD * float(np.median(np.abs(zk - np.median(zk)))) or 1.0
        new_keep = np.abs(z - np.median(zk)) <= clip_sigma * scale
        if new_keep.sum() < 3 or np.array_equal(new_keep, keep):
            break
        keep = new_keep
    gain = 1.0 / s if s > 0 else math.inf
    what = ("read + shot" if s > 0 else "read only (levels too close to resolve shot noise)")
    return NoiseModel(a, gain, f"estimated from the recording: temporal second differences "
                      f"of aperture and annulus pixels, {what}", int(keep.sum()))


# ------------------------------------------------------------------ streaming integration


@dataclass(frozen=True, eq=False)
class _Geometry:
    crop: tuple[slice, slice]  # padded union box in frame pixels
    box: tuple[int, int, int, int]  # unpadded union box (y0, y1, x0, x1) in frame pixels
    shape: tuple[int, int]  # crop (h, w)
    ap_idx: NDArray[np.intp]
    ap_spot: NDArray[np.intp]
    ap_w: NDArray[np.float32]
    ap_w2: NDArray[np.float32]
    ap_sat: NDArray[np.bool_]  # weight >= 0.5: counted for saturation
    area: NDArray[np.float64]  # sum of weights per spot
    sum_w2: NDArray[np.float64]
    bg_idx: NDArray[np.intp]  # (n_spots, m) flat crop indices, padded with -1
    bg_n: NDArray[np.intp]  # valid entries per row
    bg_spot: NDArray[np.intp]  # spot of each valid entry (flattened)
    bg_flat: NDArray[np.intp]  # crop index of each valid entry (flattened)
    pad: tuple[int, int, int, int]  # room to shift: (up, down, left, right)
    cutouts: tuple[Cutout, ...]
    backgrounds: tuple[Cutout, ...]
    annulus_px: tuple[tuple[float, float], ...]


def _annulus_for(spot_set: SpotSet, shape: tuple[int, int], *, inner: float, outer: float,
                 absolute: tuple[float, float] | None, min_px: int) -> tuple[list[Cutout], list[tuple[float, float]]]:
    spots = spot_set.spots
    excl = []
    for s in spots:
        r = absolute[0] if absolute is not None else inner * s.extent_px
        excl.append((s.x_px, s.y_px, max(r, s.extent_px)))
    out, radii = [], []
    for k, s in enumerate(spots):
        if absolute is not None:
            r_in, r_out = absolute
        else:
            r_in, r_out = inner * s.extent_px, outer * s.extent_px
        others = [e for j, e in enumerate(excl) if j != k]
        cut = annulus_cutout(s.x_px, s.y_px, r_in, r_out, shape=shape, exclude=others)
        grow = 0
        while cut.weights.sum() < min_px and grow < 6:
            r_out *= 1.25
            grow += 1
            cut = annulus_cutout(s.x_px, s.y_px, r_in, r_out, shape=shape, exclude=others)
        if cut.weights.sum() < min_px:
            raise SpotError(
                f"the background annulus of spot {s.number} holds only "
                f"{int(cut.weights.sum())} pixels once the other spots are masked out; "
                "give a background region in the spot file or smaller spots")
        out.append(cut)
        radii.append((r_in, r_out))
    return out, radii


def _runs_of_sorted_rows(keys: NDArray[Any], row_starts: NDArray[np.intp]
                         ) -> tuple[NDArray[np.intp], NDArray[np.intp], NDArray[np.intp],
                                    NDArray[np.intp]]:
    """Runs of equal keys in rows that are each sorted ascending, laid end to end.

    Parameters
    ----------
    keys : (n,) ndarray
        The rows one after another; row ``k`` is ``keys[row_starts[k]:row_starts[k+1]]``.
    row_starts : (R,) ndarray of int
        Start of each row (non-empty rows).

    Returns
    -------
    start, length, row, column : (n_runs,) ndarrays
        Each run's first position in ``keys``, its length, its row and its place among
        the runs of that row.
    """
    n = keys.size
    new = np.empty(n, bool)
    new[0] = True
    np.not_equal(keys[1:], keys[:-1], out=new[1:])
    new[row_starts] = True
    start = np.flatnonzero(new)
    length = np.diff(start, append=n)
    row = np.searchsorted(row_starts, start, side="right") - 1
    first_run = np.searchsorted(start, row_starts)
    column = np.arange(start.size) - first_run[row]
    return start, length, row, column


def _weighted_order_stats(dev: NDArray[np.float64], w: NDArray[np.int64], lo: NDArray[np.int64],
                          hi: NDArray[np.int64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Per row, the values at 0-based positions ``lo`` and ``hi`` of the multiset in
    which ``dev[r, j]`` occurs ``w[r, j]`` times (entries of weight 0 are +inf in
    ``dev`` and sort last).

    When every weight is 0 or 1 (float rows, e.g. dark-subtracted pixels) the values
    are read off one plain sort: the value at a position does not depend on how equal
    values are ordered among themselves, so this gives the numbers of the argsort with
    cumulative weights, without the argsort, the gathers and the cumulative sum (rows of
    5,000 to 20,000 distances: 1.5x to 1.7x faster for the sort alone). Else the
    argsort is stable: the distances of sorted values fall then rise, two runs that a
    stable sort merges faster than the default one sorts them.
    """
    rows = np.arange(dev.shape[0])
    if int(w.max(initial=0)) <= 1:
        dev_sorted = np.sort(dev, axis=1)
        return dev_sorted[rows, lo], dev_sorted[rows, hi]
    order = np.argsort(dev, axis=1, kind="stable")
    dev_sorted = np.take_along_axis(dev, order, axis=1)
    dcum = np.cumsum(np.take_along_axis(w, order, axis=1), axis=1)
    return (dev_sorted[rows, np.argmax(dcum > lo[:, None], axis=1)],
            dev_sorted[rows, np.argmax(dcum > hi[:, None], axis=1)])


def _clip_compact(values: NDArray[np.float64], counts: NDArray[np.int64], clip_sigma: float
                  ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64],
                             NDArray[np.intp]]:
    """Iterated median/MAD clipping of rows given as values with counts.

    ``values`` (R, U) holds each row's values in ascending order, each with its count
    (distinct values with their counts, or repeats with counts of 1: the same multiset
    gives the same numbers up to the rounding of the sums; padding: +inf with count 0).
    Iterates at most 4 times: median and MAD (x 1.4826) of the kept values; keep every
    value within ``clip_sigma`` SD of the median; stop when nothing changes or a row
    would keep fewer than 3 values. Order statistics are read off the
    cumulative counts, so ties and repeated 8-bit codes are handled exactly, and every
    row is processed at once.

    Returns
    -------
    median, mean, sd, count : (R,) ndarrays
        Of the final kept values (median: of the last iteration's input set).
    """
    n_rows = values.shape[0]
    rows = np.arange(n_rows)
    present = counts > 0
    keep = present.copy()
    med = np.zeros(n_rows)

    def order_stat(cum: NDArray[np.int64], pos: NDArray[np.int64]) -> NDArray[np.intp]:
        # Column of the value at 0-based position `pos` among the kept, per row.
        return np.argmax(cum > pos[:, None], axis=1)

    for _ in range(4):
        w = np.where(keep, counts, 0)
        cum = np.cumsum(w, axis=1)
        cnt = cum[:, -1]
        lo = np.maximum((cnt - 1) // 2, 0)
        hi = np.maximum(cnt // 2, 0)
        med = 0.5 * (values[rows, order_stat(cum, lo)] + values[rows, order_stat(cum, hi)])
        dist = np.abs(values - med[:, None])
        dev = np.where(keep, dist, np.inf)
        d_lo, d_hi = _weighted_order_stats(dev, w, lo, hi)
        sd = _MAD_TO_SD * 0.5 * (d_lo + d_hi)
        new_keep = present & (dist <= clip_sigma * sd[:, None] + 1e-30)
        new_cnt = np.where(new_keep, counts, 0).sum(axis=1)
        if np.array_equal(new_keep, keep) or (new_cnt < 3).any():
            break
        keep = new_keep
    w = np.where(keep, counts, 0).astype(np.float64)
    cnt_f = np.maximum(w.sum(axis=1), 1.0)
    v = np.where(keep, values, 0.0)
    mean = (w * v).sum(axis=1) / cnt_f
    var = (w * np.where(keep, values - mean[:, None], 0.0) ** 2).sum(axis=1) / np.maximum(cnt_f - 1, 1)
    return med, mean, np.sqrt(var), np.maximum(w.sum(axis=1), 1).astype(np.intp)


def _clipped_rows_sorted(values: Sequence[NDArray[np.floating]], clip_sigma: float
                         ) -> tuple[NDArray[np.float64], NDArray[np.float64],
                                    NDArray[np.float64], NDArray[np.intp]]:
    """Iterated median/MAD clipping of each row of ``values`` (finite, non-empty, 1-D).

    The same statistics as :meth:`SpotIntegrator._clipped_stats_masked`: each row is
    sorted and :func:`_clip_compact` clips all rows at once, every value an entry of
    count 1 (repeats are not merged: float rows, e.g. dark-subtracted pixels, hold few,
    and with counts of 1 the MAD's order statistics are read off one plain sort). The
    compiled ``clip_rows`` kernel (:mod:`ecl_quant._jit`) does the same clipping on the
    sorted rows when it is built (its kept band found by a walk out from the median, not
    a sort). Mean and SD agree with the masked form to about 1e-16 relative.
    """
    sizes = [int(v.size) for v in values]
    cv = np.full((len(sizes), max(sizes)), np.inf)
    cc = np.zeros(cv.shape, np.int64)
    for k, v in enumerate(values):
        cv[k, :sizes[k]] = np.sort(v)
        cc[k, :sizes[k]] = 1
    kernels = _jit.kernels()
    if kernels is not None:
        return kernels.clip_rows(cv, cc, np.asarray(sizes, np.int64), clip_sigma)
    return _clip_compact(cv, cc, clip_sigma)


def _clip_runs(keys: NDArray[Any], row_starts: NDArray[np.intp], clip_sigma: float, *,
               key_value: NDArray[np.float64] | None = None,
               extra_rows: NDArray[np.intp] | None = None,
               extra_values: NDArray[np.float64] | None = None
               ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64],
                          NDArray[np.intp]]:
    """:func:`_clip_compact` of rows sorted by ``keys``.

    ``key_value`` maps an integer key to its value (ascending with the key; default:
    the keys are the values). ``extra_rows``/``extra_values`` add single values to rows
    (pixels whose value has no key, e.g. replaced hot pixels).
    """
    start, length, row, col = _runs_of_sorted_rows(keys, row_starts)
    head = keys[start]
    return _clip_entries(row, col, head if key_value is None else key_value[head], length,
                         row_starts.size, clip_sigma, extra_rows=extra_rows,
                         extra_values=extra_values)


def _clip_entries(row: NDArray[np.intp], col: NDArray[np.intp], values: NDArray[np.floating],
                  counts: NDArray[np.integer], n_rows: int, clip_sigma: float, *,
                  in_order: bool = True, extra_rows: NDArray[np.intp] | None = None,
                  extra_values: NDArray[np.float64] | None = None
                  ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64],
                             NDArray[np.intp]]:
    """:func:`_clip_compact` of (row, column, value, count) entries, plus single values
    ``extra_values`` in rows ``extra_rows``. ``in_order``: each row's entries already
    ascend by value (columns 0, 1, ...); otherwise, or with extras, rows are sorted."""
    per_row = np.bincount(row, minlength=n_rows)
    n_extra = 0 if extra_rows is None else int(extra_rows.size)
    extra_col = np.zeros(0, np.intp)
    if n_extra:
        assert extra_rows is not None and extra_values is not None
        order = np.argsort(extra_rows, kind="stable")
        extra_rows, extra_values = extra_rows[order], extra_values[order]
        first = np.searchsorted(extra_rows, np.arange(n_rows))
        extra_col = per_row[extra_rows] + np.arange(n_extra) - first[extra_rows]
        per_row = per_row + np.bincount(extra_rows, minlength=n_rows)
    width = int(per_row.max())
    cv = np.full((n_rows, width), np.inf)
    cc = np.zeros((n_rows, width), np.int64)
    cv[row, col] = values
    cc[row, col] = counts
    if n_extra:
        cv[extra_rows, extra_col] = extra_values
        cc[extra_rows, extra_col] = 1
    if n_extra or not in_order:
        order = np.argsort(cv, axis=1, kind="stable")
        cv = np.take_along_axis(cv, order, axis=1)
        cc = np.take_along_axis(cc, order, axis=1)
    return _clip_compact(cv, cc, clip_sigma)


class SpotIntegrator:
    """Per-frame spot sums, backgrounds and saturation on linear crops (streaming).

    Built once from a :class:`~ecl_quant.spots.SpotSet`: every spot becomes a weight
    cutout and every background (annulus with the other spots masked out, or a user
    region) a list of pixels, all as flat indices into one crop (the union of their
    bounding boxes, padded by ``pad_px`` for drift). :meth:`add` then takes the crop of
    one frame and the integer content shift and does one gather, two ``np.bincount``
    and a vectorised sigma-clipped median; memory stays flat (per frame only a few
    numbers per spot are kept).

    Parameters
    ----------
    spot_set : SpotSet
    frame_shape : (int, int)
        (H, W) of the recording.
    annulus_inner, annulus_outer : float
        Annulus radii in multiples of each spot's extent (its radius for circles).
    annulus_px : (float, float), optional
        Absolute radii in pixels instead.
    annulus_min_px : int
        Fewer background pixels than this is an error (the annulus grows first).
    pad_px : int
        Margin for drift around the union box.
    clip_sigma : float
        Sigma clipping of the background (median +- clip_sigma x 1.4826 MAD, iterated).
    estimator : {"mean", "median"}
        Background level from the clipped pixels: their mean (default; not quantised on
        8-bit data) or their median.

    Raises
    ------
    SpotError
        A spot outside the frame, or a background with too few pixels.
    """

    def __init__(self, spot_set: SpotSet, frame_shape: tuple[int, int], *,
                 annulus_inner: float = 1.2, annulus_outer: float = 2.0,
                 annulus_px: tuple[float, float] | None = None, annulus_min_px: int = 20,
                 pad_px: int = 20, clip_sigma: float = 3.0, estimator: str = "mean") -> None:
        if estimator not in ("mean", "median"):
            raise SpotError(f"background estimator must be 'mean' or 'median', not {estimator!r}")
        self.estimator = estimator
        if len(spot_set) == 0:
            raise SpotError("no spots to integrate")
        h, w = int(frame_shape[0]), int(frame_shape[1])
        spot_set.check_fits((h, w))
        self.spot_set = spot_set
        self.frame_shape = (h, w)
        self.clip_sigma = float(clip_sigma)
        self.geometry = self._build(spot_set, (h, w), annulus_inner, annulus_outer,
                                    annulus_px, annulus_min_px, int(pad_px))
        n = len(spot_set)
        self.n_spots = n
        self._rows: dict[str, list[NDArray[Any]]] = {
            k: [] for k in ("sum", "sum_w2", "bg", "bg_sd", "bg_n", "sat", "shift")}
        self.times_s: list[float] = []
        # Noise statistics: per frame and group (spot apertures, then annuli):
        # pixel count, sum of levels, sum of squared second differences.
        self._noise: list[NDArray[np.float64]] = []
        self._prev: list[tuple[NDArray[np.float32], tuple[int, int]]] = []

    # -------------------------------------------------------------- geometry
    @staticmethod
    def _build(spot_set: SpotSet, shape: tuple[int, int], inner: float, outer: float,
               absolute: tuple[float, float] | None, min_px: int, pad: int) -> _Geometry:
        h, w = shape
        cutouts = [spot_cutout(s).clipped(shape) for s in spot_set.spots]
        numbers = spot_set.numbers
        own: dict[int, list[Cutout]] = {n: [] for n in numbers}
        shared: list[Cutout] = []
        for region in spot_set.backgrounds:
            cut = region_cutout(region, shape=shape)
            if region.spots:
                for n in region.spots:
                    own[n].append(cut)
            else:
                shared.append(cut)
        need_annulus = [not own[n] and not shared for n in numbers]
        annuli: list[Cutout | None] = [None] * len(numbers)
        radii: list[tuple[float, float]] = [(math.nan, math.nan)] * len(numbers)
        if any(need_annulus):
            a_cuts, a_radii = _annulus_for(spot_set, shape, inner=inner, outer=outer,
                                           absolute=absolute, min_px=min_px)
            for k, need in enumerate(need_annulus):
                if need:
                    annuli[k], radii[k] = a_cuts[k], a_radii[k]
        bgs: list[list[Cutout]] = []
        for k, n in enumerate(numbers):
            if annuli[k] is not None:
                bgs.append([annuli[k]])  # type: ignore[list-item]
            else:
                bgs.append(own[n] or shared)
        # Union box of everything, padded.
        boxes = [(c.y0, c.y0 + c.weights.shape[0], c.x0, c.x0 + c.weights.shape[1])
                 for c in cutouts + [b for lst in bgs for b in lst] if c.weights.size]
        y0 = min(b[0] for b in boxes)
        y1 = max(b[1] for b in boxes)
        x0 = min(b[2] for b in boxes)
        x1 = max(b[3] for b in boxes)
        cy0, cy1 = max(0, y0 - pad), min(h, y1 + pad)
        cx0, cx1 = max(0, x0 - pad), min(w, x1 + pad)
        ch, cw = cy1 - cy0, cx1 - cx0
        # Pixel positions are stored relative to the padded crop; a content shift (sx, sy)
        # adds sy * cw + sx to every index (the crop has room: pad on each side).

        def flat(c: Cutout, mask: NDArray[np.bool_]) -> NDArray[np.intp]:
            rr, cc = np.nonzero(mask)
            return ((rr + c.y0 - cy0) * cw + (cc + c.x0 - cx0)).astype(np.intp)

        ap_idx, ap_spot, ap_w = [], [], []
        area, sum_w2 = [], []
        for k, c in enumerate(cutouts):
            m = c.weights > 0
            if not m.any():
                raise SpotError(f"spot {numbers[k]} covers no pixel of the frame")
            ap_idx.append(flat(c, m))
            ap_spot.append(np.full(int(m.sum()), k, np.intp))
            ap_w.append(c.weights[m])
            area.append(float(c.weights[m].sum(dtype=np.float64)))
            sum_w2.append(float((c.weights[m].astype(np.float64) ** 2).sum()))
        bg_lists = []
        for k, lst in enumerate(bgs):
            idx = np.unique(np.concatenate([flat(b, b.weights > 0) for b in lst]))
            if idx.size < min_px:
                raise SpotError(f"the background of spot {numbers[k]} holds only {idx.size} "
                                f"pixels inside the frame; make the region larger")
            bg_lists.append(idx)
        m = max(len(i) for i in bg_lists)
        bg_idx = np.full((len(bg_lists), m), -1, np.intp)
        for k, idx in enumerate(bg_lists):
            bg_idx[k, :idx.size] = idx
        bg_n = np.array([len(i) for i in bg_lists], np.intp)
        w_all = np.concatenate(ap_w).astype(np.float32)
        return _Geometry(
            crop=(slice(cy0, cy1), slice(cx0, cx1)), box=(y0, y1, x0, x1), shape=(ch, cw),
            ap_idx=np.concatenate(ap_idx), ap_spot=np.concatenate(ap_spot), ap_w=w_all,
            ap_w2=(w_all * w_all).astype(np.float32), ap_sat=w_all >= 0.5,
            area=np.array(area), sum_w2=np.array(sum_w2), bg_idx=bg_idx, bg_n=bg_n,
            bg_spot=np.concatenate([np.full(len(i), k, np.intp) for k, i in enumerate(bg_lists)]),
            bg_flat=np.concatenate(bg_lists),
            pad=(y0 - cy0, cy1 - y1, x0 - cx0, cx1 - x1),
            cutouts=tuple(cutouts), backgrounds=tuple(b for lst in bgs for b in lst),
            annulus_px=tuple(radii))

    @property
    def region(self) -> tuple[slice, slice]:
        """The crop (row slice, column slice) to read from every frame."""
        return self.geometry.crop

    def clip_shift(self, dx_px: float, dy_px: float) -> tuple[int, int, bool]:
        """Whole-pixel content shift, limited to the crop's margins.

        Returns
        -------
        sx, sy : int
        clipped : bool
            True when the shift had to be limited.
        """
        up, down, left, right = self.geometry.pad
        sx, sy = int(round(dx_px)), int(round(dy_px))
        cx, cy = min(max(sx, -left), right), min(max(sy, -up), down)
        return cx, cy, (cx, cy) != (sx, sy)

    # -------------------------------------------------------------- per frame
    def _flat_indices(self) -> dict[str, NDArray[Any]]:
        """Per-frame constants of :meth:`add`, made once: the gather indices of the
        aperture + background pixels and of the padded background rows, the pixel groups
        of the noise statistics and their sizes."""
        fast = self.__dict__.get("_fast")
        if fast is None:
            g = self.geometry
            n = self.n_spots
            groups = np.concatenate([g.ap_spot, n + g.bg_spot])
            group_n = np.bincount(groups, minlength=2 * n)
            starts = np.concatenate([[0], np.cumsum(group_n)[:-1]]).astype(np.intp)
            fast = {"pix": np.concatenate([g.ap_idx, g.bg_flat]),
                    "bg": np.where(g.bg_idx >= 0, g.bg_idx, 0),
                    "groups": groups,
                    "group_n": group_n.astype(np.float64),
                    # Group sums by np.add.reduceat (the groups are consecutive runs;
                    # the same sequential float64 sums as np.bincount, much faster)
                    # unless a group is empty.
                    "starts": starts if (group_n > 0).all() else None,
                    "bg_cuts": np.cumsum(g.bg_n)[:-1],
                    "bg_row32": g.bg_spot.astype(np.int32)}
            self._fast = fast
        return fast

    def _clipped_stats(self, vals: NDArray[np.float32]
                       ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.intp]]:
        """Row-wise sigma clipping of the (n_spots, m) background values.

        Iterates (at most 4 times): median and MAD of the kept values, keep values within
        ``clip_sigma`` x 1.4826 MAD of the median. Returns the clipped median, the
        clipped mean, the SD of the kept values and their count. The mean is not
        quantised like the median of 8-bit codes is (a median jumps by whole code steps).

        Finite values go through :func:`_clipped_rows_sorted` (one sort per row, the
        same result); any non-finite value through the masked form below.
        """
        g = self.geometry
        if (g.bg_n >= 1).all() and np.isfinite(vals).all():
            return _clipped_rows_sorted([vals[k, :int(n)] for k, n in enumerate(g.bg_n)],
                                        self.clip_sigma)
        return self._clipped_stats_masked(vals)

    def _clipped_stats_masked(self, vals: NDArray[np.float32]
                              ) -> tuple[NDArray[np.float64], NDArray[np.float64],
                                         NDArray[np.float64], NDArray[np.intp]]:
        """:meth:`_clipped_stats` with masks and full sorts (handles NaN and inf)."""
        g = self.geometry
        n_rows, m = vals.shape
        valid = np.arange(m)[None, :] < g.bg_n[:, None]
        x = vals.astype(np.float64)
        keep = valid & np.isfinite(x)
        rows = np.arange(n_rows)
        med = np.zeros(n_rows)
        for _ in range(4):
            cnt = keep.sum(axis=1)
            lo = np.maximum((cnt - 1) // 2, 0)
            hi = np.maximum(cnt // 2, 0)
            xs = np.sort(np.where(keep, x, np.inf), axis=1)
            med = 0.5 * (xs[rows, lo] + xs[rows, hi])
            dev = np.sort(np.where(keep, np.abs(x - med[:, None]), np.inf), axis=1)
            sd = _MAD_TO_SD * 0.5 * (dev[rows, lo] + dev[rows, hi])
            new_keep = valid & np.isfinite(x) & (
                np.abs(x - med[:, None]) <= self.clip_sigma * sd[:, None] + 1e-30)
            if np.array_equal(new_keep, keep) or (new_keep.sum(axis=1) < 3).any():
                break
            keep = new_keep
        cnt = np.maximum(keep.sum(axis=1), 1)
        mean = np.where(keep, x, 0.0).sum(axis=1) / cnt
        var = np.where(keep, (x - mean[:, None]) ** 2, 0.0).sum(axis=1) / np.maximum(cnt - 1, 1)
        return med, mean, np.sqrt(var), cnt

    def _clipped_from_codes(self, coded: Any, codes: NDArray[Any], gone: NDArray[np.intp],
                            gone_values: NDArray[np.floating]
                            ) -> tuple[NDArray[np.float64], NDArray[np.float64],
                                       NDArray[np.float64], NDArray[np.intp]] | None:
        """Background clipping from integer codes instead of float values.

        ``codes`` are the background entries' codes (``geometry.bg_flat`` order, shifted);
        ``gone`` the entries whose value is not their code's (replaced hot pixels), with
        their values. An annulus holds few distinct codes (a few dozen for 8-bit video),
        so a histogram of (row, code) over the frame's code range gives each row's
        distinct values and counts in linear time; with a wide code range (16-bit
        stills) the codes' ranks are sorted by radix instead. Either way no float sort.
        None when a row would be empty (the caller then uses the float values).
        """
        g = self.geometry
        fast = self._flat_indices()
        rows = fast["bg_row32"]
        n_rows = self.n_spots
        extra_rows = extra_values = None
        if gone.size:
            extra_rows = g.bg_spot[gone]
            extra_values = np.asarray(gone_values, np.float64)
            if (np.bincount(extra_rows, minlength=n_rows) >= g.bg_n).any():
                return None
        if getattr(coded, "paired", False):
            # Y' * 256 + C: the two bytes span a few codes each; their product is small.
            hi = codes >> 8
            lo = (codes & 0xFF).astype(np.int32)
            h_min, h_max = int(hi.min()), int(hi.max())
            l_min, l_max = int(lo.min()), int(lo.max())
            l_span = l_max - l_min + 1
            span = (h_max - h_min + 1) * l_span
            key = None
            if span * n_rows <= 4 * codes.size:
                key = hi.astype(np.int32)
                key -= np.int32(h_min)
                key *= np.int32(l_span)
                key += lo
                key -= np.int32(l_min)

            def code_of(k: NDArray[np.intp]) -> NDArray[np.intp]:
                return ((k // l_span + h_min) << 8) + (k % l_span + l_min)
        else:
            c_min, c_max = int(codes.min()), int(codes.max())
            span = c_max - c_min + 1
            key = None
            if span * n_rows <= 4 * codes.size:
                key = codes.astype(np.int32)
                if c_min:
                    key -= np.int32(c_min)

            def code_of(k: NDArray[np.intp]) -> NDArray[np.intp]:
                return k + c_min
        if key is not None:
            comb = rows * np.int32(span)
            comb += key
            hist = np.bincount(comb, minlength=n_rows * span)
            if gone.size:
                np.subtract.at(hist, comb[gone], 1)
            nz = np.flatnonzero(hist)
            row = nz // span
            first = np.searchsorted(row, np.arange(n_rows))
            col = np.arange(nz.size) - first[row]
            # Entries come in code order; _clip_entries sorts each row by value.
            return _clip_entries(row, col, coded.table[code_of(nz - row * span)], hist[nz],
                                 n_rows, self.clip_sigma, in_order=False,
                                 extra_rows=extra_rows, extra_values=extra_values)
        if gone.size:
            keep = np.ones(codes.size, bool)
            keep[gone] = False
            codes, rows = codes[keep], rows[keep]
        keys = coded.rank[codes]
        row_n = np.bincount(rows, minlength=n_rows)
        cuts = np.cumsum(row_n)
        row_starts = np.concatenate([[0], cuts[:-1]]).astype(np.intp)
        for a, b in zip(row_starts, cuts):
            keys[a:b].sort(kind="stable")  # radix sort for 8/16-bit keys
        return _clip_runs(keys, row_starts, self.clip_sigma, key_value=coded.rank_value,
                          extra_rows=extra_rows, extra_values=extra_values)

    def _entries_at(self, crop_idx: NDArray[np.intp]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
        """Where these unshifted crop indices occur among the gathered pixels (aperture
        then background entries; a shared background region lists a pixel once per
        spot): positions, and for each the index into ``crop_idx``."""
        fast = self._flat_indices()
        order = fast.get("pix_order")
        if order is None:
            order = np.argsort(fast["pix"], kind="stable")
            fast["pix_order"], fast["pix_sorted"] = order, fast["pix"][order]
        srt = fast["pix_sorted"]
        left = np.searchsorted(srt, crop_idx, "left")
        right = np.searchsorted(srt, crop_idx, "right")
        counts = right - left
        total = int(counts.sum())
        if total == 0:
            z = np.zeros(0, np.intp)
            return z, z
        which = np.repeat(np.arange(crop_idx.size), counts)
        within = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
        pos = order[np.repeat(left, counts) + within]
        k = np.argsort(pos, kind="stable")
        return pos[k].astype(np.intp), which[k].astype(np.intp)

    def add(self, linear_crop: NDArray[np.floating] | None, *, time_s: float,
            shift_px: tuple[float, float] = (0.0, 0.0),
            saturated_crop: NDArray[np.bool_] | Callable[[], NDArray[np.bool_]] | None = None,
            coded: Any = None, replaced: NDArray[np.intp] | None = None,
            replaced_values: NDArray[np.floating] | None = None,
            saturation_floor: int | None = None) -> None:
        """Integrate one frame.

        Parameters
        ----------
        linear_crop : (h, w) ndarray of float32, or None
            Linear values (dark subtracted when a dark is used) of ``self.region``.
            None: the values are read from ``coded`` (only the pixels used).
        time_s : float
            Frame time.
        shift_px : (float, float)
            Content displacement (dx, dy) of this frame relative to the spot coordinates;
            rounded to whole pixels and limited to the margins (:meth:`clip_shift`).
        saturated_crop : (h, w) ndarray of bool, or a function returning one, optional
            Saturated pixels of the same crop. A function is called only when needed:
            with ``saturation_floor``, not when every aperture pixel's code (its Y' for
            video) is below the floor.
        coded : CodedCrop, optional
            The same crop as codes (:func:`ecl_quant.radiometry.code_values`): anything
            with ``codes`` (h, w), ``table`` (the value of each code), ``rank`` (a rank
            per code, sorting like the values), ``rank_value`` (the value of each rank)
            and ``paired``. ``linear_crop``, when given, must equal ``table[codes]``
            except at ``replaced``. Makes the background statistics faster; the results
            are the same.
        replaced : (k,) ndarray of int, optional
            Flat crop indices whose value is not their code's (hot pixels filled in).
        replaced_values : (k,) ndarray of float, optional
            Their values; required with ``replaced`` when ``linear_crop`` is None.
        saturation_floor : int, optional
            A code (video: Y', :func:`ecl_quant.radiometry.saturation_floor`) below which
            no pixel is saturated; replaced pixels are not counted as saturated.
        """
        g = self.geometry
        coded_shape = None if coded is None else tuple(getattr(coded, "shape", None)
                                                       or coded.codes.shape)
        if coded is not None and coded_shape != g.shape:
            raise SpotError(f"coded crop is {coded_shape} but the integrator "
                            f"expects {g.shape}")
        if linear_crop is None:
            if coded is None:
                raise SpotError("give linear_crop or coded")
            if replaced is not None and replaced.size and replaced_values is None:
                raise SpotError("replaced pixels need replaced_values when no linear_crop "
                                "is given")
        elif linear_crop.shape != g.shape:
            raise SpotError(f"crop is {linear_crop.shape} but the integrator expects {g.shape}")
        sx, sy, _ = self.clip_shift(*shift_px)
        off = sy * g.shape[1] + sx
        n = self.n_spots
        fast = self._flat_indices()
        n_ap = g.ap_idx.size
        if replaced is not None and replaced.size:
            hit, which = self._entries_at(replaced - off)
        else:
            hit = which = np.zeros(0, np.intp)
        starts = fast["starts"]
        kernels = _jit.kernels() if coded is not None and starts is not None else None
        compiled = None
        if kernels is not None:
            compiled = self._add_compiled(kernels, coded, linear_crop, sx, sy, off, hit,
                                          which, replaced_values)
        if compiled is not None:
            pix, s1, s2, (med, mean, sd, cnt), noise_sums, y_max = compiled
            if (callable(saturated_crop) and saturation_floor is not None
                    and y_max < saturation_floor):
                saturated_crop = None  # no aperture pixel can be saturated
            self._finish_frame(pix, s1, s2, med, mean, sd, cnt, time_s=time_s,
                               shift_px=shift_px, sx=sx, sy=sy, off=off,
                               saturated_crop=saturated_crop, noise_sums=noise_sums)
            return
        # Aperture then background pixels in one gather (no index arithmetic unshifted).
        where = fast["pix"] + off if off else fast["pix"]
        pix_codes = None
        if linear_crop is None:
            pix_codes = coded.codes.reshape(-1)[where]
            pix = np.take(coded.table, pix_codes)
            if hit.size:
                assert replaced_values is not None
                pix[hit] = np.asarray(replaced_values, pix.dtype)[which]
        else:
            pix = linear_crop.reshape(-1)[where]
        ap = pix[:n_ap]
        s1 = self._group_sums(g.ap_w * ap, n)
        s2 = self._group_sums(g.ap_w2 * ap, n)
        bg_pix = pix[n_ap:]
        clipped = None
        if coded is not None and starts is not None:
            bg_codes = (pix_codes[n_ap:] if pix_codes is not None
                        else coded.codes.reshape(-1)[where[n_ap:]])
            gone = hit[hit >= n_ap] - n_ap
            clipped = self._clipped_from_codes(coded, bg_codes, gone, bg_pix[gone])
        if clipped is not None:
            med, mean, sd, cnt = clipped
        elif starts is not None and np.isfinite(bg_pix).all():
            # The annulus rows are consecutive runs of the gathered pixels.
            med, mean, sd, cnt = _clipped_rows_sorted(np.split(bg_pix, fast["bg_cuts"]),
                                                      self.clip_sigma)
        else:
            if linear_crop is None:  # padded rows from the gathered values
                padded = np.full(fast["bg"].shape, np.nan, np.float32)
                valid = np.arange(padded.shape[1])[None, :] < g.bg_n[:, None]
                padded[valid] = bg_pix
                med, mean, sd, cnt = self._clipped_stats(padded)
            else:
                flat = linear_crop.reshape(-1)
                med, mean, sd, cnt = self._clipped_stats(flat[fast["bg"] + off if off
                                                              else fast["bg"]])
        self._finish_frame(pix, s1, s2, med, mean, sd, cnt, time_s=time_s, shift_px=shift_px,
                           sx=sx, sy=sy, off=off, saturated_crop=saturated_crop,
                           noise_sums=None)

    @staticmethod
    def _saturation(saturated_crop: Any) -> NDArray[np.bool_] | None:
        return saturated_crop() if callable(saturated_crop) else saturated_crop

    def _group_sums(self, weights: NDArray[Any], count: int) -> NDArray[np.float64]:
        """Sums of ``weights`` over the first ``count`` pixel groups (aperture: n,
        aperture + background: 2n), in float64."""
        fast = self._flat_indices()
        starts = fast["starts"]
        if starts is None:
            return np.bincount(fast["groups"][:weights.size], weights=weights,
                               minlength=count)
        return np.add.reduceat(weights, starts[:count], dtype=np.float64)

    def _finish_frame(self, pix: NDArray[np.float32], s1: NDArray[np.float64],
                      s2: NDArray[np.float64], med: NDArray[np.float64],
                      mean: NDArray[np.float64], sd: NDArray[np.float64],
                      cnt: NDArray[np.integer[Any]], *, time_s: float,
                      shift_px: tuple[float, float], sx: int, sy: int, off: int,
                      saturated_crop: NDArray[np.bool_] | None,
                      noise_sums: tuple[NDArray[np.float64], NDArray[np.float64]] | None
                      ) -> None:
        """Store one frame's sums and background, its saturation counts and noise
        statistics. ``pix``: the values of the gathered pixels (aperture then
        background). ``noise_sums``: (level, squared second difference) sums per group
        when already computed for this frame, else computed here."""
        g = self.geometry
        n = self.n_spots
        level = mean if self.estimator == "mean" else med
        saturated_crop = self._saturation(saturated_crop)
        if saturated_crop is not None and saturated_crop.any():
            sflat = saturated_crop.reshape(-1)[g.ap_idx + off] & g.ap_sat
            sat = np.rint(self._group_sums(sflat, n)).astype(np.int64)
        else:  # no saturated pixel anywhere in the crop: every count is 0
            sat = np.zeros(n, np.int64)
        r = self._rows
        r["sum"].append(s1)
        r["sum_w2"].append(s2)
        r["bg"].append(level)
        r["bg_sd"].append(sd)
        r["bg_n"].append(cnt)
        r["sat"].append(sat)
        r["shift"].append(np.array([shift_px[0], shift_px[1], sx, sy], np.float64))
        self.times_s.append(float(time_s))
        # Temporal second differences for the noise model, on pixels at the same card
        # position (same whole-pixel shift in three consecutive frames).
        self._prev.append((pix.astype(np.float32, copy=False), (sx, sy)))
        if len(self._prev) > 3:
            self._prev.pop(0)
        stats = np.full((2 * n, 3), np.nan)
        if len(self._prev) == 3 and len({p[1] for p in self._prev}) == 1:
            if noise_sums is not None:
                lev, sq = noise_sums
            else:
                x0, x1, x2 = (p[0] for p in self._prev)
                # Differences of float32 values in float64: exact (float32 differences
                # of nearly equal values would carry ~1e-6 relative rounding).
                d2 = x2.astype(np.float64)
                d2 -= x1
                d2 -= x1
                d2 += x0
                d2 *= d2
                lev = self._group_sums(x1, 2 * n)
                sq = self._group_sums(d2, 2 * n)
            stats = np.column_stack([self._flat_indices()["group_n"], lev, sq])
            if saturated_crop is not None:
                stats[:n][sat > 0] = np.nan
        self._noise.append(stats)

    def _add_compiled(self, kernels: Any, coded: Any, linear_crop: NDArray[np.floating] | None,
                      sx: int, sy: int, off: int, hit: NDArray[np.intp],
                      which: NDArray[np.intp], replaced_values: NDArray[np.floating] | None
                      ) -> tuple[Any, ...] | None:
        """:meth:`add`'s numbers by the compiled kernels (:mod:`ecl_quant._jit`), or None
        where they do not apply (the numpy path then runs). Codes come from the decoded
        planes when ``coded`` has a ``source`` (only the pixels used are read), else
        from its crop."""
        fast = self._flat_indices()
        table = coded.table
        if table.dtype != np.float32:
            return None
        source = getattr(coded, "source", None)
        shifts = None if source is None else source.step_shifts
        if shifts is None:
            source = None  # chroma steps that are not powers of two: from the crop
        if source is None and coded.codes.dtype not in (np.uint8, np.uint16):
            return None
        runs = fast.get("runs")
        if runs is None:
            runs = _jit.as_runs(fast["pix"], self.geometry.shape[1])
            fast["runs"] = runs
            fast["starts_all"] = np.append(fast["starts"], fast["pix"].size).astype(np.int64)
        if hit.size:
            if linear_crop is not None:
                hit_values = linear_crop.reshape(-1)[fast["pix"][hit] + off].astype(np.float32)
            else:
                assert replaced_values is not None
                hit_values = np.asarray(replaced_values, np.float32)[which]
        else:
            hit_values = np.zeros(0, np.float32)
        prev = self._prev
        with_noise = (len(prev) >= 2 and prev[-1][1] == (sx, sy) and prev[-2][1] == (sx, sy)
                      and prev[-1][0].size == fast["pix"].size)
        x0, x1 = ((prev[-2][0], prev[-1][0]) if with_noise
                  else (np.zeros(0, np.float32), np.zeros(0, np.float32)))
        vals = np.empty(fast["pix"].size, np.float32)
        g = self.geometry
        common = (table, fast["starts_all"], g.ap_w, g.ap_w2, hit.astype(np.int64),
                  hit_values, x0, x1, bool(with_noise), bool(getattr(coded, "paired", False)),
                  float(self.clip_sigma), vals)
        if source is not None:
            assert shifts is not None
            out = kernels.spot_frame_planes(
                source.luma, source.chroma, int(source.bounds[0]), int(source.bounds[2]),
                shifts[0], shifts[1], runs, int(sy), int(sx), *common)
        else:  # any strides: the kernel reads rows through them
            out = kernels.spot_frame(coded.codes, runs, int(sy), int(sx), *common)
        s1, s2, med, mean, sd, cnt, lev, sq, y_max, ok = out
        if not ok:
            return None
        return (vals, s1, s2, (med, mean, sd, cnt.astype(np.intp)),
                (lev, sq) if with_noise else None, int(y_max))

    # -------------------------------------------------------------- results
    @property
    def n_frames(self) -> int:
        """Frames added so far."""
        return len(self.times_s)

    def raw_arrays(self) -> dict[str, NDArray[Any]]:
        """Per-frame arrays: sum, sum_w2, bg, bg_sd, bg_n, sat (n_frames, n_spots), shift (n_frames, 4)."""
        n = self.n_spots
        out: dict[str, NDArray[Any]] = {}
        for k, rows in self._rows.items():
            width = 4 if k == "shift" else n
            out[k] = np.array(rows) if rows else np.zeros((0, width))
        out["time_s"] = np.array(self.times_s, dtype=np.float64)
        return out

    def noise_observations(self, frames: NDArray[np.bool_] | None = None
                           ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """(level, variance, pixels) per frame and pixel group, for :func:`estimate_noise_model`.

        ``variance`` is the mean squared second difference divided by 6 (the variance
        of ``x2 - 2 x1 + x0`` for independent frames of equal variance).
        """
        if not self._noise:
            z = np.zeros(0)
            return z, z, z
        st = np.array(self._noise)  # (frames, groups, 3)
        if frames is not None:
            st = st[np.asarray(frames, bool)]
        st = st.reshape(-1, 3)
        ok = np.isfinite(st).all(axis=1) & (st[:, 0] > 1)
        st = st[ok]
        return st[:, 1] / st[:, 0], st[:, 2] / (6.0 * st[:, 0]), st[:, 0]

    def signals(self, noise: NoiseModel, *, scale: Sequence[float] | NDArray[np.float64] | None = None
                ) -> dict[str, NDArray[np.float64]]:
        """Net signal, its SE and background per frame and spot.

        ``signal = sum(w L) - background * area``; ``var = read_var * sum(w^2) +
        sum(w^2 L) / gain + area^2 * var(background)``, where var(background) is
        ``bg_sd^2 / n_bg`` for the clipped mean and ``(pi/2) bg_sd^2 / n_bg`` for the median. ``scale`` (per frame,
        e.g. 1 / exposure_s) multiplies signal, SE and background.

        Returns
        -------
        dict with (n_frames, n_spots) arrays: signal, signal_se, background (per pixel),
        background_se, saturated_px.
        """
        g = self.geometry
        r = self.raw_arrays()
        area = g.area[None, :]
        signal = r["sum"] - r["bg"] * area
        # Variance of the background level: s^2 / n for the clipped mean, pi/2 s^2 / n for
        # the median (its asymptotic efficiency for normal data).
        eff = 1.0 if self.estimator == "mean" else math.pi / 2.0
        var_bg = eff * r["bg_sd"] ** 2 / np.maximum(r["bg_n"], 1)
        var = noise.read_var * g.sum_w2[None, :] + noise.slope * np.maximum(r["sum_w2"], 0.0)
        var = var + area**2 * var_bg
        se = np.sqrt(np.maximum(var, 0.0))
        if scale is not None:
            f = np.asarray(scale, dtype=np.float64)[:, None]
            signal, se = signal * f, se * f
            bg, bg_se = r["bg"] * f, np.sqrt(var_bg) * f
        else:
            bg, bg_se = r["bg"], np.sqrt(var_bg)
        return {"signal": signal, "signal_se": se, "background": bg, "background_se": bg_se,
                "saturated_px": r["sat"].astype(np.int64)}

