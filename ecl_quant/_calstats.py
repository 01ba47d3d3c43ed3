"""Linearity tests and detection-limit formulas (private helper of ``calibration``).

References
----------
- Lack-of-fit F test with replicates: Draper & Smith, Applied Regression Analysis,
  ch. 2 (pure-error and lack-of-fit sums of squares).
- Mandel's fitting test: ISO 8466-1 / DIN 38402-51,
  DS^2 = (N - 2) s_y1^2 - (N - 3) s_y2^2, PG = DS^2 / s_y2^2 against F(1, N - 3, P).
- Grubbs' test for one outlier: Grubbs (1969) Technometrics 11, 1; ASTM E178.
- Critical value, minimum detectable value: ISO 11843-2 (noncentral t), DIN 32645
  (t_alpha + t_beta approximation and the limit of quantification at a relative
  uncertainty 1/k), Hubaux & Vos (1970) Anal. Chem. 42, 849 (prediction bands).
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import optimize, special, stats

FloatArray = NDArray[np.float64]

def t_ppf(p: float, df: float) -> float:
    """Student t quantile (scipy.special.stdtrit: the same function as stats.t.ppf, faster)."""
    return float(special.stdtrit(df, p))


def t_sf(x: Any, df: float) -> Any:
    """Student t upper tail probability."""
    return special.stdtr(df, -np.asarray(x, float))


def f_sf(x: float, d1: float, d2: float) -> float:
    """F distribution upper tail probability."""
    return float(special.fdtrc(d1, d2, x))


def f_ppf(p: float, d1: float, d2: float) -> float:
    """F distribution quantile."""
    return float(special.fdtri(d1, d2, p))


__all__ = ["t_ppf", "t_sf", "f_sf", "f_ppf", "lack_of_fit", "mandel_test", "grubbs_test", "iso11843_line", "loq_relative_line"]


def lack_of_fit(u: FloatArray, v: FloatArray, w: FloatArray, sse_w: float, n_params: int, *,
                alpha: float = 0.05) -> dict[str, Any]:
    """Lack-of-fit F test against pure error from replicate readings.

    Parameters
    ----------
    u, v, w : (n,) ndarray
        Concentrations, responses (fit space) and weights of the fitted points.
    sse_w : float
        Weighted residual sum of squares of the model.
    n_params : int
        Number of model parameters.
    alpha : float
        Significance level.

    Returns
    -------
    dict
        ``available`` False with a ``reason`` when there are no replicates or no spare
        levels; otherwise F, df_lack_of_fit, df_pure_error, ss_lack_of_fit,
        ss_pure_error, p_value, significant (True = the model does not fit).
    """
    levels, inv = np.unique(u, return_inverse=True)
    n, k = len(u), len(levels)
    if n - k < 1:
        return {"available": False, "reason": "no replicate readings at any concentration"}
    if k - n_params < 1:
        return {"available": False,
                "reason": f"{k} concentrations leave no degrees of freedom for lack of fit "
                          f"with {n_params} parameters"}
    sw = np.bincount(inv, weights=w)
    mean_k = np.bincount(inv, weights=w * v) / sw
    ss_pe = float(np.sum(w * (v - mean_k[inv]) ** 2))
    ss_lof = max(float(sse_w) - ss_pe, 0.0)
    df_lof, df_pe = k - n_params, n - k
    if ss_pe <= 0:
        f_stat, p = float("inf"), 0.0
    else:
        f_stat = (ss_lof / df_lof) / (ss_pe / df_pe)
        p = f_sf(f_stat, df_lof, df_pe)
    return {"available": True, "F": f_stat, "df_lack_of_fit": df_lof, "df_pure_error": df_pe,
            "ss_lack_of_fit": ss_lof, "ss_pure_error": ss_pe, "p_value": p, "alpha": alpha,
            "significant": bool(p < alpha)}


def mandel_test(n: int, sse_line: float, sse_quad: float, *, level: float = 0.99) -> dict[str, Any]:
    """Mandel's fitting test (ISO 8466-1): does a quadratic fit significantly better?

    Parameters
    ----------
    n : int
        Number of calibration readings N.
    sse_line, sse_quad : float
        (Weighted) residual sums of squares of the line (N - 2 df) and the quadratic
        (N - 3 df).
    level : float
        Confidence level P of the F quantile (ISO 8466-1 uses 99 %).

    Returns
    -------
    dict
        s_y1, s_y2, DS2, PG, F_crit, p_value, level, linear (True = accept the line).
    """
    if n < 4:
        return {"available": False, "reason": "Mandel's test needs at least 4 readings"}
    s1_sq = sse_line / (n - 2)
    s2_sq = sse_quad / (n - 3)
    ds2 = (n - 2) * s1_sq - (n - 3) * s2_sq
    pg = ds2 / s2_sq if s2_sq > 0 else float("inf")
    f_crit = f_ppf(level, 1, n - 3)
    p = f_sf(pg, 1, n - 3) if np.isfinite(pg) else 0.0
    return {"available": True, "s_y1": float(np.sqrt(s1_sq)), "s_y2": float(np.sqrt(s2_sq)),
            "DS2": float(ds2), "PG": float(pg), "F_crit": f_crit, "df": [1, n - 3],
            "p_value": p, "level": level, "linear": bool(pg <= f_crit)}


@lru_cache(maxsize=512)
def grubbs_critical(n: int, alpha: float) -> float:
    """Two-sided Grubbs critical value G_crit for n readings at significance alpha.

    G_crit = (n - 1) / sqrt(n) * sqrt(t^2 / (n - 2 + t^2)), t the upper alpha/(2n)
    quantile of Student's t with n - 2 degrees of freedom (Grubbs 1969; ASTM E178).
    """
    t = t_ppf(1 - alpha / (2 * n), n - 2)
    return float((n - 1) / np.sqrt(n) * np.sqrt(t * t / (n - 2 + t * t)))


def grubbs_test(values: FloatArray, *, alpha: float = 0.05) -> dict[str, Any]:
    """Two-sided Grubbs test for the single most extreme of ``values``.

    Returns
    -------
    dict
        n, G, G_crit, p_value (Bonferroni bound 2 n P(T > t_G), capped at 1), index (into
        ``values``) of the most extreme reading, outlier (G > G_crit). Fewer than 3
        readings, or no spread: ``available`` False.
    """
    values = np.asarray(values, float)
    n = len(values)
    if n < 3:
        return {"available": False, "n": n, "reason": "fewer than 3 replicates"}
    sd = float(np.std(values, ddof=1))
    if sd == 0:
        return {"available": False, "n": n, "reason": "replicates are identical"}
    dev = np.abs(values - values.mean())
    idx = int(np.argmax(dev))
    g = float(dev[idx] / sd)
    g_crit = grubbs_critical(n, alpha)
    denom = (n - 1) ** 2 - n * g * g
    if denom <= 0:
        p = 0.0
    else:
        t_g = np.sqrt(n * (n - 2) * g * g / denom)
        p = float(min(1.0, 2 * n * float(t_sf(t_g, n - 2))))
    return {"available": True, "n": n, "G": g, "G_crit": g_crit, "p_value": p, "alpha": alpha,
            "index": idx, "outlier": bool(g > g_crit)}


def _line_factor(m: int, n: int, xbar: float, sxx: float, x: float) -> float:
    return float(np.sqrt(1.0 / m + 1.0 / n + (x - xbar) ** 2 / sxx))


@lru_cache(maxsize=256)
def iso11843_delta(df: int, alpha: float, beta: float) -> float:
    """ISO 11843-2 delta: the noncentrality with P(T'(df, delta) <= t_{1-alpha}(df)) = beta."""
    t_a = t_ppf(1 - alpha, df)
    t_b = t_ppf(1 - beta, df)

    def excess(dl: float) -> float:
        return float(stats.nct.cdf(t_a, df, dl)) - beta

    # Bracket from just above t_a + t_b, doubling: far out in the tail scipy's noncentral
    # t cdf returns NaN (e.g. df=4, delta=54), which brentq cannot handle.
    hi = t_a + t_b + 1.0
    while excess(hi) > 0 and hi < 1e6:
        hi *= 2.0
    return float(optimize.brentq(excess, 0.0, hi, xtol=1e-12))


def iso11843_line(intercept: float, slope: float, s_yx: float, x: FloatArray, *,
                  alpha: float = 0.05, beta: float = 0.05, m: int = 1) -> dict[str, Any]:
    """Critical value and minimum detectable value of an unweighted calibration line.

    Parameters
    ----------
    intercept, slope, s_yx : float
        Fitted line and residual SD (n - 2 df).
    x : (n,) ndarray
        Concentrations of the calibration readings.
    alpha, beta : float
        Probabilities of false positive and false negative decisions.
    m : int
        Readings averaged for each unknown (ISO 11843-2: K).

    Returns
    -------
    dict
        critical_response y_c, critical_concentration x_c (ISO 11843-2 / DIN 32645
        Nachweisgrenze), detection_limit (ISO 11843-2, noncentral t delta),
        detection_limit_din ((t_alpha + t_beta) approximation), detection_limit_hubaux_vos
        (lower 1 - beta prediction band crosses y_c), with alpha, beta, m, df.
    """
    x = np.asarray(x, float)
    n = len(x)
    df = n - 2
    xbar = float(x.mean())
    sxx = float(np.sum((x - xbar) ** 2))
    s_x0 = s_yx / abs(slope)
    fac0 = _line_factor(m, n, xbar, sxx, 0.0)
    t_a = t_ppf(1 - alpha, df)
    t_b = t_ppf(1 - beta, df)
    x_c = t_a * s_x0 * fac0
    y_c = intercept + np.sign(slope) * t_a * s_yx * fac0
    delta = iso11843_delta(df, alpha, beta)
    x_d = delta * s_x0 * fac0
    x_d_din = (t_a + t_b) * s_x0 * fac0

    def hv(xd: float) -> float:
        return xd - t_b * s_x0 * _line_factor(m, n, xbar, sxx, xd) - x_c

    hi = max(float(x.max()), x_d_din) * 10 + 1.0
    x_hv = optimize.brentq(hv, 0.0, hi, xtol=1e-14, rtol=1e-13) if hv(hi) > 0 else float("nan")
    return {"available": True, "alpha": alpha, "beta": beta, "m": m, "df": df,
            "critical_response": float(y_c), "critical_concentration": float(x_c),
            "delta": float(delta), "detection_limit": float(x_d),
            "detection_limit_din": float(x_d_din),
            "detection_limit_hubaux_vos": float(x_hv)}


def loq_relative_line(slope: float, s_yx: float, x: FloatArray, *, k: float = 3.0,
                      alpha: float = 0.05, m: int = 1) -> float:
    """DIN 32645 limit of quantification of a line: x_Q = k t s_x0 factor(x_Q).

    The concentration whose two-sided (1 - alpha) inverse-prediction half-width is
    1/k of itself; solved exactly (the factor depends on x_Q).
    """
    x = np.asarray(x, float)
    n = len(x)
    xbar = float(x.mean())
    sxx = float(np.sum((x - xbar) ** 2))
    t2 = t_ppf(1 - alpha / 2, n - 2)
    s_x0 = s_yx / abs(slope)

    def h(xq: float) -> float:
        return xq - k * t2 * s_x0 * _line_factor(m, n, xbar, sxx, xq)

    hi = float(x.max()) * 100 + k * t2 * s_x0 * 10
    if h(hi) <= 0:
        return float("nan")
    return float(optimize.brentq(h, 0.0, hi, xtol=1e-14, rtol=1e-13))
