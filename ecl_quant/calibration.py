"""Calibration: models, inverse prediction with uncertainty, LOD/LOQ, linearity tests.

A calibration relates the response of standards (usually the integrated emission of a
spot) to their concentration. This module fits one of

- ``linear``: ordinary least-squares line;
- ``wls``: weighted line (weights 1/x^2, 1/y^2, 1/variance, or given);
- ``quadratic``: second-order polynomial (ISO 8466-2);
- ``power``: y = a x^b, fitted as a line of ln y on ln x;
- ``4pl`` / ``5pl``: four- and five-parameter logistic (bounded fit);
- ``auto``: the line when Mandel's test and the lack-of-fit test accept it, otherwise
  the nonlinear candidate with the lowest AICc; the reason is recorded,

and turns the readings of an unknown into a concentration with a standard error and a
confidence interval (classical s_x0 for lines, the delta method for the others, or a
parametric bootstrap), flagged ``below_lod``, ``below_loq``, ``above_range``,
``extrapolated`` or ``no_solution``. Limits follow IUPAC (blank mean + 3 s / 10 s), ICH
Q2 (3.3 sigma/S, 10 sigma/S), Miller & Miller (intercept + 3 s_y/x) and ISO 11843-2 /
DIN 32645 (critical value, minimum detectable value, LOQ at a relative uncertainty
1/k). The method used is recorded with the numbers.

All public functions take plain arrays or pandas tables; the result is a frozen
:class:`Calibration` with ``to_dict()`` (the versioned, hashed ``calibration.json``),
``predict``, ``inverse`` and ``inverse_predict``.

References
----------
J.N. Miller & J.C. Miller, Statistics and Chemometrics for Analytical Chemistry, ch. 5;
D.L. Massart et al. (1997) Handbook of Chemometrics and Qualimetrics Part A, ch. 8;
ISO 8466-1 and -2; ISO 11843-2; DIN 32645; ICH Q2(R1); IUPAC Gold Book L03540.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import platform
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import optimize

from . import __version__
from ._calmodels import MODELS, FitResult, ModelDef, batch_refit, fit_model, fit_to_public, public_to_fit
from ._calstats import (grubbs_test, iso11843_line, lack_of_fit, loq_relative_line, mandel_test,
                        t_ppf, t_sf)
from .errors import CalibrationError, InputFormatError

FloatArray = NDArray[np.float64]

__all__ = [
    "MODEL_NAMES",
    "WEIGHT_RULES",
    "FLAG_WORDS",
    "CalibrationOptions",
    "Calibration",
    "InversePrediction",
    "fit_calibration",
    "calibrate_table",
    "quantify_table",
    "read_table",
    "save_calibration",
    "load_calibration",
    "plot_calibration",
    "calibration_hash",
]

MODEL_NAMES = ("auto", "linear", "wls", "quadratic", "power", "4pl", "5pl")
WEIGHT_RULES = ("none", "1/x2", "1/y2", "1/var")
FLAG_WORDS = ("below_lod", "below_loq", "above_range", "extrapolated", "no_solution")
ROLES = ("standard", "blank", "unknown")
FORMAT_NAME = "ecl_quant.calibration"
FORMAT_VERSION = 1


@dataclass(frozen=True)
class CalibrationOptions:
    """Settings for limits and tests (grouped so the fit functions stay short).

    Attributes
    ----------
    lod_method : {"auto", "blank", "intercept", "ich"}
        Primary LOD/LOQ used for flags and the working range. ``blank``: IUPAC,
        mean_blank + k s_blank converted through the calibration; ``intercept``: Miller &
        Miller, blank estimated by the intercept and s_y/x; ``ich``: ICH Q2, 3.3 sigma/S
        and 10 sigma/S. ``auto``: ``blank`` with at least 3 blank readings, else ``ich``.
    ich_sigma : {"residual", "intercept_se", "blank"}
        Which sigma ICH Q2 uses: residual SD of the calibration (at the lowest level for
        weighted fits), SE of the intercept, or SD of the blanks.
    k_lod, k_loq : float
        Multipliers of the blank SD (IUPAC / Miller & Miller): 3 and 10.
    ich_k_lod, ich_k_loq : float
        ICH Q2 multipliers: 3.3 and 10.
    alpha, beta : float
        False-positive and false-negative probabilities for ISO 11843-2 / DIN 32645.
    readings_per_unknown : int
        Readings averaged per unknown, used by the ISO 11843 limits and the LOQ by
        relative precision (m in the formulas).
    loq_relative_k : float
        DIN 32645 LOQ: the concentration whose (1 - alpha) half-width is 1/k of itself.
    mandel_level : float
        Confidence level of Mandel's test (99 % as in ISO 8466-1, from memory).
    lof_alpha : float
        Significance level of the lack-of-fit test.
    grubbs_alpha : float
        Significance level of Grubbs' test on replicates (flags only, nothing dropped).
    include_blanks : bool or None
        Fit the blank readings as points at concentration 0. None: yes, except for models
        or weights that cannot take x = 0 (power law, 1/x^2), where blanks only set the LOD.
    """

    lod_method: str = "auto"
    ich_sigma: str = "residual"
    k_lod: float = 3.0
    k_loq: float = 10.0
    ich_k_lod: float = 3.3
    ich_k_loq: float = 10.0
    alpha: float = 0.05
    beta: float = 0.05
    readings_per_unknown: int = 1
    loq_relative_k: float = 3.0
    mandel_level: float = 0.99
    lof_alpha: float = 0.05
    grubbs_alpha: float = 0.05
    include_blanks: bool | None = None

    def __post_init__(self) -> None:
        checks = [
            (self.lod_method in ("auto", "blank", "intercept", "ich"),
             f"lod_method {self.lod_method!r} is not one of auto, blank, intercept, ich"),
            (self.ich_sigma in ("residual", "intercept_se", "blank"),
             f"ich_sigma {self.ich_sigma!r} is not one of residual, intercept_se, blank"),
            (all(0 < p < 1 for p in (self.alpha, self.beta, self.mandel_level, self.lof_alpha,
                                     self.grubbs_alpha)), "probabilities must lie in (0, 1)"),
            (min(self.k_lod, self.k_loq, self.ich_k_lod, self.ich_k_loq, self.loq_relative_k) > 0,
             "limit multipliers must be positive"),
            (int(self.readings_per_unknown) >= 1, "readings_per_unknown must be >= 1"),
        ]
        for ok, msg in checks:
            if not ok:
                raise CalibrationError(msg)


@dataclass(frozen=True)
class InversePrediction:
    """Concentration of one unknown read back through a calibration.

    Attributes
    ----------
    concentration : float
        Estimated concentration x0 (NaN when the response has no solution).
    se : float
        Standard error of x0 (concentration units).
    ci_low, ci_high : float
        Confidence interval at ``level``.
    flags : tuple of str
        Words from ``FLAG_WORDS``.
    level : float
        Confidence level.
    method : str
        ``classical`` (line, Miller & Miller s_x0), ``delta`` (delta method) or
        ``bootstrap`` (parametric, studentized).
    n_readings : int
        Readings m averaged.
    response_mean : float
        Mean response of the readings.
    response_se : float
        Standard error of the mean response used (fit space: log units for ``power``).
    variance_source : str
        ``calibration`` (s_y/x and the weight at the unknown) or ``reading`` (its y_se
        was larger).
    df : float
        Degrees of freedom of the t quantile: n - p, or the Welch-Satterthwaite effective
        degrees of freedom when the unknown's own y_se (infinite df) carries part of the
        variance.
    units : str
        Concentration units.
    n_draws, n_failed : int
        Bootstrap draws used and refits that failed (0 for analytic methods).
    """

    concentration: float
    se: float
    ci_low: float
    ci_high: float
    flags: tuple[str, ...]
    level: float
    method: str
    n_readings: int
    response_mean: float
    response_se: float
    variance_source: str
    df: float
    units: str = ""
    n_draws: int = 0
    n_failed: int = 0

    @property
    def flags_text(self) -> str:
        """Flags joined by ';' (empty string when none)."""
        return ";".join(self.flags)

    def to_dict(self) -> dict[str, Any]:
        """Plain dict (flags as a ';'-joined string)."""
        out = dataclasses.asdict(self)
        out["flags"] = self.flags_text
        return out


def _clean(obj: Any) -> Any:
    """JSON-safe copy: numpy scalars to Python, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_clean(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if np.isfinite(obj) else None
    return obj


def _num(value: Any) -> float:
    """None -> NaN, else float."""
    return float("nan") if value is None else float(value)


def _readonly(a: ArrayLike, dtype: Any = float) -> NDArray[Any]:
    arr = np.array(a, dtype=dtype, copy=True)
    arr.flags.writeable = False
    return arr


@dataclass(frozen=True, eq=False)
class Calibration:
    """A fitted calibration (frozen). Build with :func:`fit_calibration`.

    Attributes
    ----------
    model : str
        One of ``linear``, ``wls``, ``quadratic``, ``power``, ``4pl``, ``5pl``.
    param_names : tuple of str
    params : (p,) ndarray of float64
        Public parameters (power law: a, b of y = a x^b).
    covariance : (p, p) ndarray of float64
        Parameter covariance (scaled by s_y/x^2).
    s_yx : float
        Residual SD (weighted, at weight 1; log units for ``power``), df = n - p.
    df, n : int
        Residual degrees of freedom and number of fitted readings.
    r2 : float
        Coefficient of determination in fit space (weighted when weights are used).
    log_likelihood, aic, aicc : float
        Gaussian log-likelihood of the responses (parameters + sigma counted in AIC).
    weights : str
        Weight rule: ``none``, ``1/x2``, ``1/y2``, ``1/var`` or ``given``.
    weight_source : str
        Where the weights came from (e.g. ``replicate variance``, ``response_se``).
    level : float
        Default confidence level.
    units, response_units : str
        Concentration and response units.
    x, y : (N,) ndarray
        Every reading given (standards and blanks), in input order.
    w : (N,) ndarray
        Weight of each fitted reading in fit space (NaN where not fitted; for the power
        law the linear-space weight times response^2).
    role : (N,) ndarray of str
        ``standard`` or ``blank``.
    in_fit : (N,) ndarray of bool
        Reading used in the fit.
    response_se : (N,) ndarray
        Measurement SE of each reading (NaN when not given).
    outlier : (N,) ndarray of bool
        Flagged by Grubbs' test (never dropped).
    limits, tests, working_range, selection : dict
        JSON-ready results (see :func:`fit_calibration`).
    notes : tuple of str
    options : CalibrationOptions
    provenance : dict
    """

    model: str
    param_names: tuple[str, ...]
    params: FloatArray
    covariance: FloatArray
    s_yx: float
    df: int
    n: int
    r2: float
    log_likelihood: float
    aic: float
    aicc: float
    weights: str
    weight_source: str
    level: float
    units: str
    response_units: str
    x: FloatArray
    y: FloatArray
    w: FloatArray
    role: NDArray[np.str_]
    in_fit: NDArray[np.bool_]
    response_se: FloatArray
    outlier: NDArray[np.bool_]
    limits: dict[str, Any] = field(default_factory=dict)
    tests: dict[str, Any] = field(default_factory=dict)
    working_range: dict[str, Any] = field(default_factory=dict)
    selection: dict[str, Any] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    options: CalibrationOptions = field(default_factory=CalibrationOptions)
    provenance: dict[str, Any] = field(default_factory=dict)

    # ------------------------------------------------------------------ derived state
    @cached_property
    def _mdef(self) -> ModelDef:
        return MODELS[self.model]

    @cached_property
    def _fitspace(self) -> tuple[FloatArray, FloatArray]:
        return public_to_fit(self._mdef, self.params, self.covariance)

    @property
    def _theta(self) -> FloatArray:
        return self._fitspace[0]

    @property
    def _cov_fit(self) -> FloatArray:
        return self._fitspace[1]

    def _to_u(self, x: ArrayLike) -> FloatArray:
        x = np.asarray(x, float)
        if self._mdef.log_space:
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.log(np.where(x > 0, x, np.nan))
        return x

    def _to_v(self, y: ArrayLike) -> FloatArray:
        return self._to_u(y)

    def _from_u(self, u: ArrayLike) -> FloatArray:
        u = np.asarray(u, float)
        return np.exp(u) if self._mdef.log_space else u

    @cached_property
    def _uvw(self) -> tuple[FloatArray, FloatArray, FloatArray]:
        m = self.in_fit
        return self._to_u(self.x[m]), self._to_v(self.y[m]), np.asarray(self.w[m], float)

    @cached_property
    def _branch(self) -> float:
        u = self._uvw[0]
        mid = 0.5 * (u.min() + u.max())
        s = float(np.sign(self._mdef.dfdu(self._theta, np.array([mid]))[0]))
        return s if s != 0 else 1.0

    @cached_property
    def _s2(self) -> float:
        return self.s_yx**2

    @cached_property
    def _covu(self) -> FloatArray:
        """Unscaled covariance (J^T W J)^-1 in fit space."""
        return self._cov_fit / self._s2 if self._s2 > 0 else self._cov_fit

    @cached_property
    def _fit_context(self) -> FitResult:
        """FitResult for bootstrap refits, rebuilt from the stored data and parameters."""
        u, v, w = self._uvw
        if self._mdef.linear_in_params:
            return fit_model(self._mdef, u, v, w)
        from ._calmodels import _int_bounds

        five = self._mdef.n_params == 5
        u_ref = float(u.max())
        v_lo = float(v.min())
        v_span = float(np.ptp(v)) or 1.0
        resid = v - self._mdef.f(self._theta, u)
        return FitResult(self._theta, self._covu, resid, float(np.sum(w * resid**2)), self.df,
                         extra={"scaling": (u_ref, v_lo, v_span),
                                "bounds": _int_bounds(five, float(u[u > 0].min()), u_ref)})

    @property
    def x_fit_range(self) -> tuple[float, float]:
        """Lowest and highest concentration among the fitted standards."""
        xs = self.x[self.in_fit]
        return float(xs.min()), float(xs.max())

    @property
    def parameters(self) -> dict[str, float]:
        """Parameter name -> value."""
        return dict(zip(self.param_names, (float(p) for p in self.params)))

    @property
    def standard_errors(self) -> dict[str, float]:
        """Parameter name -> standard deviation (sqrt of the covariance diagonal)."""
        return dict(zip(self.param_names, (float(s) for s in np.sqrt(np.diag(self.covariance)))))

    @property
    def lod(self) -> float:
        """Primary limit of detection (concentration units; NaN if not available)."""
        return _num(self.limits.get("lod"))

    @property
    def loq(self) -> float:
        """Primary limit of quantification (concentration units; NaN if not available)."""
        return _num(self.limits.get("loq"))

    # ------------------------------------------------------------------ evaluation
    def predict(self, x: ArrayLike) -> Any:
        """Response at concentration(s) ``x`` (same shape; scalar in, float out)."""
        xa = np.asarray(x, float)
        if self._mdef.log_space:
            with np.errstate(divide="ignore", invalid="ignore"):
                out = self.params[0] * np.where(xa >= 0, xa, np.nan) ** self.params[1]
        else:
            out = self._mdef.f(self._theta, xa.ravel()).reshape(xa.shape)
        return float(out) if np.ndim(x) == 0 else out

    def inverse(self, y: ArrayLike) -> Any:
        """Concentration giving response(s) ``y`` (NaN where no solution)."""
        ya = np.asarray(y, float)
        u = self._mdef.inv(self._theta, self._to_v(ya).ravel(), self._branch).reshape(ya.shape)
        out = self._from_u(u)
        return float(out) if np.ndim(y) == 0 else out

    def slope_at(self, x: ArrayLike) -> Any:
        """Sensitivity d response / d concentration at ``x``."""
        xa = np.asarray(x, float)
        if self._mdef.log_space:
            with np.errstate(divide="ignore", invalid="ignore"):
                out = self.params[0] * self.params[1] * xa ** (self.params[1] - 1.0)
        else:
            out = self._mdef.dfdu(self._theta, xa.ravel()).reshape(xa.shape)
        return float(out) if np.ndim(x) == 0 else out

    def _weight_at(self, x0: FloatArray, y_mean: FloatArray) -> FloatArray:
        """Weight a new reading gets under the calibration's weight rule."""
        x0 = np.asarray(x0, float)
        if self.weights == "none":
            return np.ones_like(x0)
        if self.weights in ("1/x2", "1/y2"):
            if self.weights == "1/x2":
                xmin = float(self.x[self.in_fit & (self.x > 0)].min())
                xx = np.where(np.isfinite(x0) & (x0 > xmin), x0, xmin)
                w_lin = 1.0 / xx**2
            else:
                w_lin = 1.0 / np.asarray(y_mean, float) ** 2
            # the power law is fitted in logs: var(ln y) ~ var(y) / y^2
            return w_lin * np.asarray(y_mean, float) ** 2 if self._mdef.log_space else w_lin
        # 1/var or given: interpolate the mean variance factor 1/w between the levels
        u, _, w = self._uvw
        xs = self.x[self.in_fit]
        levels = np.unique(xs)
        inv_w = np.array([np.mean(1.0 / w[xs == lv]) for lv in levels])
        xx = np.where(np.isfinite(x0), x0, levels[0])
        return 1.0 / np.interp(xx, levels, inv_w)

    def _t(self, level: float, df: int | None = None) -> float:
        return t_ppf(0.5 + level / 2.0, self.df if df is None else df)

    def _delta_var_u(self, u0: FloatArray, var_v0: FloatArray, theta: FloatArray | None = None,
                     cov: FloatArray | None = None) -> FloatArray:
        """Delta-method variance of u0 = inverse(v0): (var_v0 + g' C g) / slope^2."""
        th = self._theta if theta is None else theta
        c = self._cov_fit if cov is None else cov
        g = self._mdef.jac(th, u0)  # (..., G, p)
        gcg = np.einsum("...gi,...ij,...gj->...g", g, c, g)
        slope = self._mdef.dfdu(th, u0)
        with np.errstate(divide="ignore", invalid="ignore"):
            return (var_v0 + gcg) / slope**2

    def _reading_var(self, y_read: FloatArray, y_se: FloatArray | None, x0: float,
                     weight: float | None, s2: float | FloatArray) -> tuple[Any, str, Any]:
        """Per-reading variance in fit space, max(s2 / w0, y_se^2).

        Returns the variances (..., m), the source label, and a mask of the readings whose
        variance comes from the calibration's s^2 (n - p df) rather than their own y_se.
        """
        if weight is not None:
            w0 = np.full(y_read.shape, float(weight))
        elif self.weights == "1/var" and y_se is not None:
            w0 = 1.0 / self._se_fit(y_read, y_se) ** 2
        else:
            w0 = np.broadcast_to(self._weight_at(np.array([x0]), np.array([y_read.mean()])),
                                 y_read.shape).astype(float)
        var_cal = np.asarray(s2)[..., None] / w0
        if y_se is None:
            return var_cal, "calibration", np.ones(var_cal.shape, bool)
        se_sq = self._se_fit(y_read, y_se) ** 2
        from_s = var_cal >= se_sq
        src = "calibration" if np.all(from_s) else "reading"
        return np.maximum(var_cal, se_sq), src, from_s

    def _se_fit(self, y_read: FloatArray, y_se: FloatArray) -> FloatArray:
        """Reading SEs in fit space (relative SE for the log-space power law)."""
        return np.asarray(y_se, float) / y_read if self._mdef.log_space else np.asarray(y_se, float)

    def inverse_predict(self, y_readings: ArrayLike, *, y_se: ArrayLike | None = None,
                        method: str = "analytic", level: float | None = None,
                        weight: float | None = None, n_draws: int = 2000,
                        seed: int = 0) -> InversePrediction:
        """Concentration, standard error and confidence interval of one unknown.

        Parameters
        ----------
        y_readings : (m,) array_like or float
            The unknown's replicate responses (averaged).
        y_se : (m,) array_like or float, optional
            The unknown's own measurement SE per reading (e.g. ``integral_se`` of a spot).
            Each reading's variance is then the larger of the calibration's reading
            variance (s_y/x^2 over the weight at the unknown) and y_se^2: the residual
            scatter of the standards already contains a typical reading's measurement
            noise, so adding the two would count it twice; the larger keeps a noisier
            unknown honest. With ``1/var`` weights the unknown's weight is 1 / y_se^2.
        method : {"analytic", "bootstrap"}
            ``analytic``: classical s_x0 (lines; Miller & Miller eq. 5.9, weighted form as
            Massart et al. eq. 8.28) or the delta method (other models), interval
            x0 +- t(df) s_x0. ``bootstrap``: parametric bootstrap with ``n_draws`` refits of
            simulated standards and readings, studentized (bootstrap-t) interval.
        level : float, optional
            Confidence level (default: the calibration's).
        weight : float, optional
            Weight of the unknown's readings (default: from the weight rule at x0).
        n_draws, seed : int
            Bootstrap draws and random seed.

        Returns
        -------
        InversePrediction
        """
        y_read = np.atleast_1d(np.asarray(y_readings, float)).ravel()
        if y_read.size == 0 or not np.all(np.isfinite(y_read)):
            raise CalibrationError("the unknown's readings must be finite numbers (got "
                                   f"{y_read.tolist()!r})")
        se_arr = None
        if y_se is not None:
            se_arr = np.broadcast_to(np.asarray(y_se, float), y_read.shape).copy()
            if not np.all(np.isfinite(se_arr) & (se_arr >= 0)):
                raise CalibrationError("y_se must be finite and >= 0 for every reading")
        if method not in ("analytic", "bootstrap"):
            raise CalibrationError(f"method {method!r} is not one of analytic, bootstrap")
        lvl = self.level if level is None else float(level)
        if not 0 < lvl < 1:
            raise CalibrationError(f"level must lie in (0, 1), got {lvl}")
        return self._predict_groups([y_read], [se_arr], method=method, level=lvl, weight=weight,
                                    n_draws=n_draws, seed=seed)[0]

    def _predict_groups(self, groups: Sequence[FloatArray], ses: Sequence[FloatArray | None], *,
                        method: str, level: float, weight: float | None, n_draws: int,
                        seed: int) -> list[InversePrediction]:
        boot = self._bootstrap_draws(n_draws, seed) if method == "bootstrap" else None
        t = self._t(level)
        out = []
        for gi, (y_read, se_arr) in enumerate(zip(groups, ses)):
            m = y_read.size
            v_read = self._to_v(y_read)
            v0 = float(np.mean(v_read))
            y_mean = float(np.mean(y_read))
            u0 = float(self._mdef.inv(self._theta, np.array([v0]), self._branch)[0])
            x0 = float(self._from_u(u0)) if np.isfinite(u0) else float("nan")
            var_r, src, from_s = self._reading_var(y_read, se_arr, x0, weight, self._s2)
            var_v0 = float(np.sum(var_r) / m**2)
            flags = self._flags(x0, v0)
            n_failed = 0
            df_eff = float(self.df)
            if not np.isfinite(u0) or not np.isfinite(v0):
                se = lo = hi = float("nan")
                meth = "none"
            elif boot is None:
                var_u = float(self._delta_var_u(np.array([u0]), var_v0)[0])
                se_u = float(np.sqrt(var_u))
                # Welch-Satterthwaite: the part from the calibration (parameters, and readings
                # whose variance is s^2 / w) has n - p df; a reading's own y_se has infinite df
                var_s_part = float(self._delta_var_u(
                    np.array([u0]), float(np.sum(var_r[from_s])) / m**2)[0])
                df_eff = float(self.df) if var_s_part >= var_u else \
                    var_u**2 / (var_s_part**2 / self.df)
                t_eff = t if df_eff == self.df else self._t(level, df_eff)
                lo_u, hi_u = u0 - t_eff * se_u, u0 + t_eff * se_u
                se = x0 * se_u if self._mdef.log_space else se_u
                lo, hi = float(self._from_u(lo_u)), float(self._from_u(hi_u))
                meth = "classical" if self.model in ("linear", "wls") else "delta"
            else:
                se, lo, hi, n_failed = self._bootstrap_interval(boot, u0, v0, y_read, se_arr,
                                                                weight, x0, level, seed, gi)
                meth = "bootstrap"
            out.append(InversePrediction(
                concentration=x0, se=float(se), ci_low=float(lo), ci_high=float(hi),
                flags=flags, level=level, method=meth, n_readings=m, response_mean=y_mean,
                response_se=float(np.sqrt(var_v0)), variance_source=src,
                df=df_eff if boot is None and np.isfinite(u0) else float(self.df),
                units=self.units, n_draws=0 if boot is None else n_draws, n_failed=n_failed))
        return out

    def _flags(self, x0: float, v0: float) -> tuple[str, ...]:
        flags: list[str] = []
        lo_x, hi_x = self.x_fit_range
        lod, loq = self.lod, self.loq
        if not np.isfinite(x0):
            flags.append("no_solution")
            u = self._uvw[0]
            mid = 0.5 * (u.min() + u.max())
            v_mid = float(self._mdef.f(self._theta, np.array([mid]))[0])
            top = (v0 - v_mid) * self._branch > 0
            if top:
                flags.append("above_range")
            else:
                flags += ["below_lod", "below_loq"]
            return tuple(f for f in FLAG_WORDS if f in flags)
        if np.isfinite(lod) and x0 < lod:
            flags.append("below_lod")
        if np.isfinite(loq) and x0 < loq:
            flags.append("below_loq")
        high = _num(self.working_range.get("high"))
        if x0 > (high if np.isfinite(high) else hi_x):
            flags.append("above_range")
        if x0 < lo_x or x0 > hi_x:
            flags.append("extrapolated")
        return tuple(f for f in FLAG_WORDS if f in flags)

    # ------------------------------------------------------------------ bootstrap
    def _bootstrap_draws(self, n_draws: int, seed: int) -> dict[str, Any]:
        """Parametric bootstrap refits of the standards (cached per n_draws and seed)."""
        cache = self.__dict__.setdefault("_boot_cache", {})
        key = (int(n_draws), int(seed))
        if key in cache:
            return cache[key]
        if n_draws < 100:
            raise CalibrationError(f"n_draws must be at least 100, got {n_draws}")
        u, _, w = self._uvw
        rng = np.random.default_rng([int(seed), 0])
        mu = self._mdef.f(self._theta, u)
        v_star = mu + rng.standard_normal((n_draws, u.size)) * np.sqrt(self._s2 / w)
        theta, s2, covu, ok = batch_refit(self._mdef, self._fit_context, u, v_star, w)
        res = {"theta": theta[ok], "s2": s2[ok], "cov": covu[ok] * s2[ok, None, None],
               "n_failed": int((~ok).sum())}
        cache[key] = res
        return res

    def _bootstrap_interval(self, boot: dict[str, Any], u0: float, v0: float, y_read: FloatArray,
                            se_arr: FloatArray | None, weight: float | None, x0: float,
                            level: float, seed: int, group: int) -> tuple[float, float, float, int]:
        theta, s2, cov = boot["theta"], boot["s2"], boot["cov"]
        n_b = theta.shape[0]
        m = y_read.size
        rng = np.random.default_rng([int(seed), 1, group])
        var_r, _, _ = self._reading_var(y_read, se_arr, x0, weight, self._s2)
        var_v0 = float(np.sum(var_r) / m**2)
        v0_star = v0 + rng.standard_normal(n_b) * np.sqrt(var_v0)
        u0_star = self._mdef.inv(theta, v0_star[:, None], self._branch)[:, 0]
        var_r_star, _, _ = self._reading_var(y_read, se_arr, x0, weight, s2)
        var_v0_star = np.sum(var_r_star, axis=-1) / m**2
        var_u_star = self._delta_var_u(u0_star[:, None], var_v0_star[:, None], theta, cov)[:, 0]
        se_u_hat = float(np.sqrt(self._delta_var_u(np.array([u0]), var_v0)[0]))
        ok = np.isfinite(u0_star) & np.isfinite(var_u_star) & (var_u_star > 0)
        n_failed = int(boot["n_failed"] + (~ok).sum())
        if ok.sum() < 0.5 * n_b:
            return float("nan"), float("nan"), float("nan"), n_failed
        t_star = (u0_star[ok] - u0) / np.sqrt(var_u_star[ok])
        q_lo, q_hi = np.quantile(t_star, [0.5 - level / 2, 0.5 + level / 2])
        lo_u, hi_u = u0 - q_hi * se_u_hat, u0 - q_lo * se_u_hat
        sd_u = float(np.std(u0_star[ok], ddof=1))
        se = x0 * sd_u if self._mdef.log_space else sd_u
        return se, float(self._from_u(lo_u)), float(self._from_u(hi_u)), n_failed

    # ------------------------------------------------------------------ bands and tables
    def bands(self, x: ArrayLike, *, level: float | None = None,
              m: int = 1) -> dict[str, FloatArray]:
        """Fitted curve with confidence (mean response) and prediction (new reading) bands.

        Parameters
        ----------
        x : (k,) array_like
            Concentrations.
        level : float, optional
        m : int
            Readings averaged for the prediction band.

        Returns
        -------
        dict of (k,) ndarray
            fit, conf_low, conf_high, pred_low, pred_high (response units).
        """
        lvl = self.level if level is None else level
        xa = np.atleast_1d(np.asarray(x, float))
        u = self._to_u(xa)
        v = self._mdef.f(self._theta, u)
        g = self._mdef.jac(self._theta, u)
        var_f = np.einsum("gi,ij,gj->g", g, self._cov_fit, g)
        w0 = self._weight_at(xa, self._from_u(v))
        var_p = var_f + self._s2 / (w0 * m)
        t = self._t(lvl)
        out = {"fit": v, "conf_low": v - t * np.sqrt(var_f), "conf_high": v + t * np.sqrt(var_f),
               "pred_low": v - t * np.sqrt(var_p), "pred_high": v + t * np.sqrt(var_p)}
        return {k: self._from_u(val) for k, val in out.items()}

    def residuals(self) -> pd.DataFrame:
        """Residuals table of every reading (fit space for ``power``).

        Columns: concentration, response, role, in_fit, fitted, residual, weight,
        standardized (residual * sqrt(w) / s_y/x), leverage, studentized, outlier.
        """
        u = self._to_u(self.x)
        v = self._to_v(self.y)
        with np.errstate(all="ignore"):
            fitted_v = self._mdef.f(self._theta, u)
            resid = v - fitted_v
            std = resid * np.sqrt(self.w) / self.s_yx
        lev = np.full(self.x.shape, np.nan)
        uf, _, wf = self._uvw
        j = self._mdef.jac(self._theta, uf) * np.sqrt(wf)[:, None]
        q, _ = np.linalg.qr(j)
        lev[self.in_fit] = np.sum(q**2, axis=1)
        with np.errstate(all="ignore"):
            stud = std / np.sqrt(1.0 - lev)
        return pd.DataFrame({
            "concentration": self.x, "response": self.y, "role": self.role,
            "in_fit": self.in_fit, "fitted": self._from_u(fitted_v), "residual": resid,
            "weight": self.w, "standardized": std, "leverage": lev, "studentized": stud,
            "outlier": self.outlier})

    def to_frame(self) -> pd.DataFrame:
        """The data used with fitted values and residuals (same as :meth:`residuals`)."""
        return self.residuals()

    def parameters_frame(self) -> pd.DataFrame:
        """Parameters with standard errors and t-based confidence limits at ``level``."""
        sd = np.sqrt(np.diag(self.covariance))
        t = self._t(self.level)
        return pd.DataFrame({"parameter": list(self.param_names), "value": self.params,
                             "se": sd, "ci_low": self.params - t * sd,
                             "ci_high": self.params + t * sd})

    def summary(self) -> str:
        """A few lines for the terminal, with units."""
        cu = self.units or "conc. units"
        ru = self.response_units or "response units"
        lines = [f"model: {self.model} ({self._mdef.description})",
                 f"  chosen because: {self.selection.get('reason', 'requested')}"]
        for name, val, sd in zip(self.param_names, self.params, np.sqrt(np.diag(self.covariance))):
            lines.append(f"  {name} = {val:.6g} +- {sd:.3g}")
        space = " (ln units)" if self._mdef.log_space else f" {ru}"
        lines.append(f"  s_y/x = {self.s_yx:.6g}{space}, n = {self.n}, df = {self.df}, "
                     f"R^2 = {self.r2:.6f}, AICc = {self.aicc:.4g}")
        lim = self.limits
        lines.append(f"  LOD = {self.lod:.4g} {cu}, LOQ = {self.loq:.4g} {cu} "
                     f"({lim.get('method')}: {lim.get('basis', '')})")
        wr = self.working_range
        lines.append(f"  working range: {_num(wr.get('low')):.4g} to {_num(wr.get('high')):.4g} {cu}")
        mand = self.tests.get("mandel", {})
        if mand.get("available"):
            lines.append(f"  Mandel: PG = {mand['PG']:.4g}, F(1,{mand['df'][1]},{mand['level']}) = "
                         f"{mand['F_crit']:.4g} -> {'linear' if mand['linear'] else 'not linear'}")
        lof = self.tests.get("lack_of_fit", {})
        if lof.get("available"):
            lines.append(f"  lack of fit: F = {lof['F']:.4g}, p = {lof['p_value']:.3g}")
        n_out = int(self.outlier.sum())
        if n_out:
            rows = ", ".join(str(i + 1) for i in np.flatnonzero(self.outlier))
            lines.append(f"  Grubbs outliers flagged (kept): reading(s) {rows}")
        lines.extend(f"  note: {nt}" for nt in self.notes)
        return "\n".join(lines)

    # ------------------------------------------------------------------ serialisation
    def to_dict(self) -> dict[str, Any]:
        """The versioned calibration document (JSON-ready, without the hash).

        :func:`save_calibration` adds ``sha256`` and validates against
        ``ecl_quant/schemas/calibration.schema.json``.
        """
        mdef = self._mdef
        doc = {
            "format": FORMAT_NAME,
            "version": FORMAT_VERSION,
            "model": {"name": self.model, "description": mdef.description,
                      "parameter_names": list(self.param_names),
                      "fit_space": "log-log" if mdef.log_space else "linear"},
            "parameters": self.parameters,
            "standard_errors": self.standard_errors,
            "covariance": self.covariance.tolist(),
            "s_yx": self.s_yx,
            "df": self.df,
            "n": self.n,
            "n_levels": int(np.unique(self.x[self.in_fit]).size),
            "r2": self.r2,
            "log_likelihood": self.log_likelihood,
            "aic": self.aic,
            "aicc": self.aicc,
            "weights": {"rule": self.weights, "source": self.weight_source},
            "level": self.level,
            "units": {"concentration": self.units, "response": self.response_units},
            "limits": self.limits,
            "tests": self.tests,
            "working_range": self.working_range,
            "selection": self.selection,
            "notes": list(self.notes),
            "options": dataclasses.asdict(self.options),
            "data": {
                "concentration": self.x.tolist(), "response": self.y.tolist(),
                "weight": [float(v) if f else None for v, f in zip(self.w, self.in_fit)],
                "role": [str(r) for r in self.role], "in_fit": [bool(f) for f in self.in_fit],
                "response_se": [float(v) if np.isfinite(v) else None for v in self.response_se],
                "outlier": [bool(o) for o in self.outlier],
            },
            "provenance": self.provenance,
        }
        return _clean(doc)

    @classmethod
    def from_dict(cls, doc: dict[str, Any]) -> Calibration:
        """Rebuild a calibration from :meth:`to_dict` output (no refit)."""
        d = doc["data"]
        model = doc["model"]["name"]
        names = tuple(doc["model"]["parameter_names"])
        cov = np.array([[_num(v) for v in row] for row in doc["covariance"]], float)
        return cls(
            model=model, param_names=names,
            params=_readonly([_num(doc["parameters"][k]) for k in names]),
            covariance=_readonly(cov), s_yx=_num(doc["s_yx"]), df=int(doc["df"]), n=int(doc["n"]),
            r2=_num(doc["r2"]), log_likelihood=_num(doc["log_likelihood"]),
            aic=_num(doc["aic"]), aicc=_num(doc["aicc"]), weights=doc["weights"]["rule"],
            weight_source=doc["weights"]["source"], level=float(doc["level"]),
            units=doc["units"]["concentration"], response_units=doc["units"]["response"],
            x=_readonly(d["concentration"]), y=_readonly(d["response"]),
            w=_readonly([_num(v) for v in d["weight"]]), role=_readonly(d["role"], str),
            in_fit=_readonly(d["in_fit"], bool),
            response_se=_readonly([_num(v) for v in d["response_se"]]),
            outlier=_readonly(d["outlier"], bool), limits=doc["limits"], tests=doc["tests"],
            working_range=doc["working_range"], selection=doc["selection"],
            notes=tuple(doc["notes"]), options=CalibrationOptions(**doc["options"]),
            provenance=doc["provenance"])


# ============================================================================ fitting
def _provenance(function: str, arguments: dict[str, Any]) -> dict[str, Any]:
    import scipy

    return _clean({
        "software": "ecl_quant", "version": __version__, "python": platform.python_version(),
        "numpy": np.__version__, "scipy": scipy.__version__, "pandas": pd.__version__,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        "function": function, "arguments": arguments})


def _as_float_array(values: ArrayLike, name: str, *, path: str | Path | None = None) -> FloatArray:
    try:
        arr = np.asarray(values, dtype=float).ravel()
    except (TypeError, ValueError) as err:
        raise CalibrationError(f"{name} must be numbers ({err})", path=path) from err
    bad = np.flatnonzero(~np.isfinite(arr))
    if bad.size:
        raise CalibrationError(f"{name} holds a non-finite value (NaN or inf) at position "
                               f"{bad[0] + 1}; remove or fill that reading", path=path)
    return arr


def _weights_for(rule: Any, x: FloatArray, y: FloatArray, y_se: FloatArray,
                 fit: NDArray[np.bool_], path: str | Path | None) -> tuple[str, str, FloatArray]:
    """(rule name, source, weights of every row (NaN where not fitted))."""
    w = np.full(x.shape, np.nan)
    if rule is None or (isinstance(rule, str) and rule.lower() in ("none", "")):
        w[fit] = 1.0
        return "none", "unweighted", w
    if not isinstance(rule, str):
        arr = _as_float_array(rule, "weights", path=path)
        if arr.size != int(fit.sum()) and arr.size != x.size:
            raise CalibrationError(f"weights has {arr.size} values but there are {int(fit.sum())} "
                                   "fitted readings", path=path)
        if arr.size == x.size:
            arr = arr[fit]
        if np.any(arr <= 0):
            raise CalibrationError("weights must all be > 0", path=path)
        w[fit] = arr
        return "given", "given by the caller", w
    key = rule.lower().replace("^", "").replace(" ", "")
    if key == "1/x2":
        w[fit] = 1.0 / x[fit] ** 2
        return "1/x2", "1 / concentration^2", w
    if key == "1/y2":
        if np.any(y[fit] == 0):
            raise CalibrationError("weights 1/y2 need non-zero responses", path=path)
        w[fit] = 1.0 / y[fit] ** 2
        return "1/y2", "1 / response^2", w
    if key in ("1/var", "1/variance", "1/s2"):
        se = y_se[fit]
        if np.all(np.isfinite(se)) and np.all(se > 0):
            w[fit] = 1.0 / se**2
            return "1/var", "1 / response_se^2", w
        xs, ys = x[fit], y[fit]
        levels, inv, counts = np.unique(xs, return_inverse=True, return_counts=True)
        if counts.min() < 2:
            lv = levels[np.argmin(counts)]
            raise CalibrationError(
                f"weights 1/var need replicate readings at every concentration (level {lv:g} "
                "has 1) or a response_se for every standard", path=path)
        var = np.array([np.var(ys[inv == k], ddof=1) for k in range(levels.size)])
        if np.any(var <= 0):
            lv = levels[np.argmin(var)]
            raise CalibrationError(f"weights 1/var: the replicates at level {lv:g} are identical "
                                   "(zero variance); use another weight rule", path=path)
        w[fit] = 1.0 / var[inv]
        return "1/var", "1 / replicate variance at each level", w
    raise CalibrationError(f"unknown weight rule {rule!r}; use one of none, 1/x2, 1/y2, 1/var",
                           path=path)


@dataclass(frozen=True)
class _Candidate:
    name: str
    fit: FitResult
    r2: float
    ll: float
    aic: float
    aicc: float


def _evaluate(name: str, x: FloatArray, y: FloatArray, w: FloatArray) -> _Candidate:
    """Fit one model to linear-space data (the power law is fitted in logs)."""
    mdef = MODELS[name]
    u, v = (np.log(x), np.log(y)) if mdef.log_space else (x, y)
    fit = fit_model(mdef, u, v, w)
    n = u.size
    k = mdef.n_params + 1  # parameters + sigma
    sse = fit.sse_w
    vbar = float(np.sum(w * v) / np.sum(w))
    sst = float(np.sum(w * (v - vbar) ** 2))
    r2 = 1.0 - sse / sst if sst > 0 else float("nan")
    sig2_ml = sse / n
    ll = -0.5 * n * (np.log(2 * np.pi * sig2_ml) + 1.0) + 0.5 * float(np.sum(np.log(w)))
    if mdef.log_space:  # density of y = density of ln y / y
        ll -= float(np.sum(np.log(y)))
    aic = 2 * k - 2 * ll
    aicc = aic + 2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else float("inf")
    return _Candidate(name, fit, r2, float(ll), float(aic), float(aicc))


def _check_quadratic(fit: FitResult, x_lo: float, x_hi: float) -> str | None:
    c0, c1, c2 = fit.theta
    if c2 == 0:
        return None
    vertex = -c1 / (2 * c2)
    if x_lo < vertex < x_hi:
        return (f"the quadratic turns over at x = {vertex:.4g} inside the standards "
                f"({x_lo:g} to {x_hi:g}), so responses there cannot be read back uniquely")
    return None


def _select(requested: str, weighted: bool, x: FloatArray, y: FloatArray, w: FloatArray,
            opts: CalibrationOptions, can_power: bool) -> tuple[_Candidate, dict[str, Any]]:
    """Fit the requested model, or choose one (``auto``); returns the candidate and why.

    ``auto`` keeps the line when Mandel's test (ISO 8466-1) and the lack-of-fit test
    accept it; otherwise it takes the candidate (quadratic, power, 4PL, 5PL) with the
    lowest AICc. The power law competes only when every concentration is > 0 and the fit
    is unweighted (its likelihood is then comparable, with the Jacobian of ln y).
    """
    n_levels = np.unique(x).size
    line_name = "wls" if weighted else "linear"
    if requested != "auto":
        name = line_name if requested in ("linear", "wls") else requested
        cand = _evaluate(name, x, y, w)
        if name == "quadratic":
            msg = _check_quadratic(cand.fit, float(x.min()), float(x.max()))
            if msg:
                raise CalibrationError(msg + "; drop the top standards or use 4pl")
        return cand, {"requested": requested, "chosen": name, "reason": "requested",
                      "candidates": [_cand_entry(cand)]}
    line = _evaluate(line_name, x, y, w)
    entries = [_cand_entry(line)]
    lof = lack_of_fit(x, y, w, line.fit.sse_w, 2, alpha=opts.lof_alpha)
    mand: dict[str, Any] = {"available": False}
    quad = None
    if n_levels >= 4:
        quad = _evaluate("quadratic", x, y, w)
        mand = mandel_test(x.size, line.fit.sse_w, quad.fit.sse_w, level=opts.mandel_level)
    why = []
    if mand.get("available"):
        why.append(f"Mandel PG = {mand['PG']:.3g} {'<=' if mand['linear'] else '>'} "
                   f"F(1, {mand['df'][1]}, {mand['level']:.2f}) = {mand['F_crit']:.3g}")
    else:
        why.append("Mandel's test not available (fewer than 4 concentrations)")
    if lof.get("available"):
        why.append(f"lack-of-fit p = {lof['p_value']:.3g} "
                   f"{'<' if lof['significant'] else '>='} {lof['alpha']}")
    else:
        why.append("lack-of-fit test not available (" + lof["reason"] + ")")
    linear_ok = mand.get("linear", True) and not lof.get("significant", False)
    if linear_ok:
        return line, {"requested": "auto", "chosen": line.name,
                      "reason": "the line is adequate: " + "; ".join(why), "candidates": entries}
    pool: list[_Candidate] = []
    for name in ("quadratic", "power", "4pl", "5pl"):
        if MODELS[name].min_levels > n_levels:
            entries.append({"model": name, "ok": False,
                            "message": f"needs {MODELS[name].min_levels} concentrations"})
            continue
        if name == "power" and not can_power:
            entries.append({"model": name, "ok": False,
                            "message": "needs every concentration > 0 and no weights"})
            continue
        try:
            cand = quad if (name == "quadratic" and quad is not None) else _evaluate(name, x, y, w)
        except CalibrationError as err:
            entries.append({"model": name, "ok": False, "message": err.reason})
            continue
        if name == "quadratic":
            msg = _check_quadratic(cand.fit, float(x.min()), float(x.max()))
            if msg:
                entries.append({"model": name, "ok": False, "message": msg})
                continue
        entries.append(_cand_entry(cand))
        pool.append(cand)
    if not pool:
        return line, {"requested": "auto", "chosen": line.name,
                      "reason": "the line was rejected (" + "; ".join(why) + ") but no "
                      "nonlinear model could be fitted; using the line, check the range",
                      "candidates": entries}
    best = min(pool, key=lambda c: c.aicc)
    table = ", ".join(f"{c.name} {c.aicc:.4g}" for c in pool)
    return best, {"requested": "auto", "chosen": best.name,
                  "reason": f"the line was rejected ({'; '.join(why)}); lowest AICc among "
                            f"the nonlinear models ({table})", "candidates": entries}


def _cand_entry(c: _Candidate) -> dict[str, Any]:
    return {"model": c.name, "ok": True, "aic": c.aic, "aicc": c.aicc, "r2": c.r2,
            "s_yx": float(np.sqrt(c.fit.s2))}


#: Largest |concentration| or |response| accepted: squares and sums of squares of the
#: data (up to x**4 in the quadratic normal equations) must stay finite in float64.
_MAX_MAGNITUDE = 1e75


def _calibrate(x: FloatArray, y: FloatArray, role: NDArray[np.str_], y_se: FloatArray, *,
               model: str, weights: Any, level: float, units: str, response_units: str,
               options: CalibrationOptions | None, path: str | Path | None,
               function: str, arguments: dict[str, Any]) -> Calibration:
    opts = options or CalibrationOptions()
    model_key = str(model).lower()
    if model_key not in MODEL_NAMES:
        raise CalibrationError(f"unknown model {model!r}; use one of {', '.join(MODEL_NAMES)}",
                               path=path)
    if not 0 < float(level) < 1:
        raise CalibrationError(f"level must lie in (0, 1), got {level}", path=path)
    if np.any(x < 0):
        i = int(np.flatnonzero(x < 0)[0])
        raise CalibrationError(f"negative concentration {x[i]:g} at reading {i + 1}; "
                               "concentrations must be >= 0", path=path)
    for name, vals in (("concentration", x), ("response", y)):
        finite = vals[np.isfinite(vals)]
        # Sums of squares of such values overflow double precision (about 1.8e308).
        if finite.size and float(np.max(np.abs(finite))) > _MAX_MAGNITUDE:
            raise CalibrationError(
                f"{name} values reach {float(np.max(np.abs(finite))):.3g}, too large to fit "
                f"in double precision (limit {_MAX_MAGNITUDE:g}); express them in larger "
                "units", path=path)
    if model_key == "wls" and (weights is None or (isinstance(weights, str)
                                                    and weights.lower() == "none")):
        raise CalibrationError("model wls needs weights (1/x2, 1/y2 or 1/var)", path=path)
    notes: list[str] = []
    is_blank = role == "blank"
    fit = np.ones(x.shape, bool)
    wkey = weights.lower().replace("^", "") if isinstance(weights, str) else None
    needs_pos = model_key == "power" or wkey == "1/x2"
    if needs_pos or opts.include_blanks is False:
        drop = (x <= 0) if needs_pos else is_blank
        if opts.include_blanks is True and needs_pos and np.any(drop):
            raise CalibrationError("include_blanks=True but the power law and 1/x2 weights "
                                   "cannot use concentration 0", path=path)
        if np.any(drop):
            fit &= ~drop
            notes.append(f"{int(drop.sum())} reading(s) at concentration 0 not fitted "
                         f"({'power law' if model_key == 'power' else 'weights 1/x2'} needs "
                         "x > 0); they serve as blanks" if needs_pos else
                         f"{int(drop.sum())} blank reading(s) not fitted (include_blanks=False)")
    if model_key == "power" and np.any(y[fit] <= 0):
        raise CalibrationError("the power law needs positive responses for every standard",
                               path=path)
    xf, yf = x[fit], y[fit]
    levels = np.unique(xf)
    need = 3 if model_key == "auto" else MODELS[model_key].min_levels
    if levels.size < need:
        raise CalibrationError(
            f"{model_key} calibration needs at least {need} distinct concentrations, got "
            f"{levels.size} ({', '.join(f'{v:g}' for v in levels)}); add standards", path=path)
    if np.ptp(yf) == 0:
        raise CalibrationError(f"every response is {yf[0]:g}: the response does not change "
                               "with concentration, so nothing can be calibrated", path=path)
    wrule, wsource, w_all = _weights_for(weights, x, y, y_se, fit, path)
    if model_key == "power" and wrule != "none":
        # var(ln y) ~ var(y) / y^2 (delta method): linear-space weights times y^2
        w_all = np.where(fit, w_all * y**2, np.nan)
        wsource += ", times response^2 for the log-space fit"
    if model_key == "linear" and wrule != "none":
        model_key = "wls"
    can_power = bool(np.all(xf > 0) and np.all(yf > 0) and wrule == "none")
    try:
        cand, selection = _select(model_key, wrule != "none", xf, yf, w_all[fit], opts, can_power)
    except CalibrationError as err:
        raise CalibrationError(err.reason, path=path) from err
    mdef = MODELS[cand.name]
    if cand.fit.df < 1:
        raise CalibrationError(f"{cand.name} leaves no residual degrees of freedom "
                               f"({xf.size} readings, {mdef.n_params} parameters)", path=path)
    s2 = cand.fit.s2
    theta_pub, cov_pub = fit_to_public(mdef, cand.fit.theta, cand.fit.cov_unscaled * s2)
    n_all = x.size
    prelim = Calibration(
        model=cand.name, param_names=mdef.param_names, params=_readonly(theta_pub),
        covariance=_readonly(cov_pub), s_yx=float(np.sqrt(s2)), df=cand.fit.df, n=int(xf.size),
        r2=cand.r2, log_likelihood=cand.ll, aic=cand.aic, aicc=cand.aicc, weights=wrule,
        weight_source=wsource, level=float(level), units=str(units),
        response_units=str(response_units), x=_readonly(x), y=_readonly(y), w=_readonly(w_all),
        role=_readonly(role, str), in_fit=_readonly(fit, bool), response_se=_readonly(y_se),
        outlier=_readonly(np.zeros(n_all, bool), bool), selection=_clean(selection),
        notes=tuple(notes), options=opts, provenance=_provenance(function, arguments))
    tests, outlier = _run_tests(prelim, cand, opts)
    blank_mask = is_blank if np.any(is_blank) else (x == 0)
    limits, lim_notes = _limits(prelim, y[blank_mask], opts)
    wr = _working_range(prelim, limits)
    slope_note = _slope_note(prelim)
    all_notes = tuple(notes + lim_notes + ([slope_note] if slope_note else []))
    if wr.get("empty"):
        all_notes += ("the LOQ lies above the highest standard: there is no working range",)
    return dataclasses.replace(prelim, tests=_clean(tests), limits=_clean(limits),
                               working_range=_clean(wr), outlier=_readonly(outlier, bool),
                               notes=all_notes)


def _slope_note(cal: Calibration) -> str | None:
    if cal.model not in ("linear", "wls"):
        return None
    b, sb = cal.params[1], float(np.sqrt(cal.covariance[1, 1]))
    p = 2 * float(t_sf(abs(b) / sb, cal.df)) if sb > 0 else 0.0
    if p > 0.05:
        return f"the slope is not significantly different from zero (p = {p:.3g})"
    return None


def _run_tests(cal: Calibration, cand: _Candidate, opts: CalibrationOptions) -> tuple[dict[str, Any], NDArray[np.bool_]]:
    u, v, w = cal._uvw
    mdef = cal._mdef
    tests: dict[str, Any] = {
        "lack_of_fit": lack_of_fit(u, v, w, cand.fit.sse_w, mdef.n_params, alpha=opts.lof_alpha)}
    # Mandel (ISO 8466-1) always compares line and quadratic on the fitted readings in
    # linear space with the same weights.
    xs, ys = cal.x[cal.in_fit], cal.y[cal.in_fit]
    if np.unique(xs).size >= 3 and xs.size >= 4:
        lin = fit_model(MODELS["linear"], xs, ys, w)
        quad = fit_model(MODELS["quadratic"], xs, ys, w)
        tests["mandel"] = mandel_test(xs.size, lin.sse_w, quad.sse_w, level=opts.mandel_level)
        if cal.model not in ("linear", "wls"):
            tests["lack_of_fit_line"] = lack_of_fit(xs, ys, w, lin.sse_w, 2, alpha=opts.lof_alpha)
    else:
        tests["mandel"] = {"available": False, "reason": "needs 3 concentrations and 4 readings"}
    # Grubbs on the replicates of every level (blanks not fitted included as a level)
    outlier = np.zeros(cal.x.shape, bool)
    groups = []
    keys = np.where(cal.role == "blank", -1.0, cal.x)
    for key in np.unique(keys):
        idx = np.flatnonzero(keys == key)
        res = grubbs_test(cal.y[idx], alpha=opts.grubbs_alpha)
        entry = {"concentration": 0.0 if key < 0 else float(key),
                 "group": "blank" if key < 0 else "standard", **res}
        if res.get("available"):
            entry["reading"] = int(idx[res["index"]]) + 1
            del entry["index"]
            if res["outlier"]:
                outlier[idx[res["index"]]] = True
        groups.append(entry)
    tests["grubbs"] = {"alpha": opts.grubbs_alpha, "levels": groups,
                       "flagged_readings": [int(i) + 1 for i in np.flatnonzero(outlier)],
                       "action": "flagged only; no reading was removed"}
    return tests, outlier


def _lowest_positive(cal: Calibration) -> float:
    xs = cal.x[cal.in_fit]
    return float(xs[xs > 0].min())


def _limits(cal: Calibration, blank_y: FloatArray, opts: CalibrationOptions) -> tuple[dict[str, Any], list[str]]:
    """Every LOD/LOQ estimate the data allow, and the primary one (``method``)."""
    notes: list[str] = []
    x_lo, x_hi = cal.x_fit_range
    # rising or falling calibration: thresholds lie above or below the blank
    direction = 1.0 if float(cal.predict(x_hi)) >= float(cal.predict(x_lo)) else -1.0
    out: dict[str, Any] = {}
    # IUPAC, from blanks
    nb = int(blank_y.size)
    if nb >= 3 and np.std(blank_y, ddof=1) > 0:
        mb, sb = float(np.mean(blank_y)), float(np.std(blank_y, ddof=1))
        y_lod, y_loq = mb + direction * opts.k_lod * sb, mb + direction * opts.k_loq * sb
        out["blank"] = {"available": True, "n_blanks": nb, "blank_mean": mb, "blank_sd": sb,
                        "k_lod": opts.k_lod, "k_loq": opts.k_loq, "lod_response": y_lod,
                        "loq_response": y_loq, "lod": _conc_at(cal, y_lod),
                        "loq": _conc_at(cal, y_loq),
                        "basis": f"IUPAC: mean of {nb} blanks + {opts.k_lod:g} / {opts.k_loq:g} "
                                 "blank SD, read back through the calibration"}
        if nb < 10:
            notes.append(f"only {nb} blank readings: the blank SD (and LOD) is uncertain; "
                         "10 or more are usual")
    else:
        out["blank"] = {"available": False,
                        "reason": f"{nb} blank reading(s) with spread; 3 or more needed"}
    # Miller & Miller: blank = intercept, s_B = s_y/x (unweighted, linear-space models)
    if cal.weights == "none" and not cal._mdef.log_space:
        yb = float(cal.predict(0.0))
        y_lod = yb + direction * opts.k_lod * cal.s_yx
        y_loq = yb + direction * opts.k_loq * cal.s_yx
        out["intercept"] = {"available": True, "blank_response": yb, "sigma": cal.s_yx,
                            "k_lod": opts.k_lod, "k_loq": opts.k_loq, "lod_response": y_lod,
                            "loq_response": y_loq, "lod": _conc_at(cal, y_lod),
                            "loq": _conc_at(cal, y_loq),
                            "basis": "Miller & Miller: blank = fitted response at 0, "
                                     f"s_B = s_y/x; {opts.k_lod:g} / {opts.k_loq:g} s_B"}
    else:
        out["intercept"] = {"available": False,
                            "reason": "needs an unweighted fit in linear space"}
    out["ich"] = _ich(cal, opts, out["blank"])
    out["iso11843"] = _iso(cal, opts)
    out["relative_precision"] = _loq_relative(cal, opts)
    method = opts.lod_method
    if method == "auto":
        method = next((m for m in ("blank", "ich", "intercept") if out[m].get("available")),
                      "none")
    if method == "none":
        notes.append("no LOD/LOQ could be estimated (no blanks, and the model has no "
                     "linear-space residual SD); measure blanks")
        return {"method": "none", "lod": None, "loq": None, "lod_response": None,
                "loq_response": None, "basis": "not available", **out}, notes
    chosen = out[method]
    if not chosen.get("available"):
        raise CalibrationError(f"LOD method {method!r} is not available: {chosen.get('reason')}")
    out.update({"method": method, "lod": chosen["lod"], "loq": chosen["loq"],
                "lod_response": chosen["lod_response"], "loq_response": chosen["loq_response"],
                "basis": chosen["basis"]})
    return {"method": out.pop("method"), **out}, notes


def _conc_at(cal: Calibration, y: float) -> float:
    """Concentration at response y through the calibration (NaN where no solution)."""
    return float(cal.inverse(y))


def _ich(cal: Calibration, opts: CalibrationOptions, blank: dict[str, Any]) -> dict[str, Any]:
    linear = cal.model in ("linear", "wls")
    at = cal.x_fit_range[0] if linear else _lowest_positive(cal)
    slope = float(cal.slope_at(at))
    if opts.ich_sigma == "blank":
        if not blank.get("available"):
            return {"available": False, "reason": "ich_sigma=blank but no usable blanks"}
        sigma, src = blank["blank_sd"], "SD of the blank responses"
    elif opts.ich_sigma == "intercept_se":
        if cal._mdef.log_space:
            return {"available": False, "reason": "no intercept in the power law"}
        g = cal._mdef.jac(cal._theta, np.array([0.0]))[0]
        sigma, src = float(np.sqrt(g @ cal._cov_fit @ g)), "SE of the fitted response at 0 (intercept)"
    else:
        if cal._mdef.log_space:
            return {"available": False,
                    "reason": "the power law's residual SD is in log units; use blanks"}
        xs = cal.x[cal.in_fit]
        w_low = float(np.mean(cal.w[cal.in_fit][xs == xs.min()]))
        sigma = cal.s_yx / np.sqrt(w_low)
        src = "residual SD s_y/x" + (" at the lowest standard" if cal.weights != "none" else "")
    if slope == 0 or not np.isfinite(slope):
        return {"available": False, "reason": "zero or undefined slope at the lowest standard"}
    lod = opts.ich_k_lod * sigma / abs(slope)
    loq = opts.ich_k_loq * sigma / abs(slope)
    return {"available": True, "sigma": float(sigma), "sigma_source": src, "slope": slope,
            "slope_at": float(at), "k_lod": opts.ich_k_lod, "k_loq": opts.ich_k_loq,
            "lod": float(lod), "loq": float(loq), "lod_response": float(cal.predict(lod)),
            "loq_response": float(cal.predict(loq)),
            "basis": f"ICH Q2: {opts.ich_k_lod:g} / {opts.ich_k_loq:g} sigma / S, sigma = {src}, "
                     f"S = slope at {at:g}"}


def _iso(cal: Calibration, opts: CalibrationOptions) -> dict[str, Any]:
    if cal.model != "linear":
        return {"available": False,
                "reason": "ISO 11843-2 / DIN 32645 formulas here assume an unweighted line"}
    xs = cal.x[cal.in_fit]
    a, b = cal.params
    res = iso11843_line(float(a), float(b), cal.s_yx, xs, alpha=opts.alpha, beta=opts.beta,
                        m=opts.readings_per_unknown)
    res["loq_din"] = loq_relative_line(float(b), cal.s_yx, xs, k=opts.loq_relative_k,
                                       alpha=opts.alpha, m=opts.readings_per_unknown)
    res["loq_k"] = opts.loq_relative_k
    return res


def _delta_se_at_conc(cal: Calibration, xq: FloatArray, m: int) -> FloatArray:
    """SE of the inverse prediction of m readings at true concentrations ``xq``."""
    uq = cal._to_u(xq)
    vq = cal._mdef.f(cal._theta, uq)
    w0 = cal._weight_at(xq, cal._from_u(vq))
    var_u = cal._delta_var_u(uq, cal._s2 / (w0 * m))
    se_u = np.sqrt(var_u)
    return xq * se_u if cal._mdef.log_space else se_u


def _loq_relative(cal: Calibration, opts: CalibrationOptions) -> dict[str, Any]:
    """Lowest concentration whose (1 - alpha) interval half-width is x / k (delta method)."""
    m = opts.readings_per_unknown
    k = opts.loq_relative_k
    t = t_ppf(1 - opts.alpha / 2, cal.df)
    x_hi = cal.x_fit_range[1]
    grid = np.geomspace(x_hi * 1e-6, x_hi, 160)
    h = grid - k * t * _delta_se_at_conc(cal, grid, m)
    ok = np.flatnonzero(np.isfinite(h) & (h > 0))
    base = {"k": k, "alpha": opts.alpha, "m": m,
            "basis": f"DIN 32645-type: lowest x with (1 - {opts.alpha:g}) half-width <= x/{k:g}"}
    if ok.size == 0:
        return {"available": False, "loq": None, **base,
                "reason": "the relative uncertainty never falls to 1/k within the standards"}
    i = int(ok[0])
    xq = float(grid[i])
    if i > 0 and np.isfinite(h[i - 1]):  # refine between the grid points around the crossing
        def fun(xx: float) -> float:
            return float(xx - k * t * _delta_se_at_conc(cal, np.array([xx]), m)[0])
        try:
            xq = float(optimize.brentq(fun, grid[i - 1], grid[i], xtol=1e-14 * x_hi,
                                       rtol=1e-12))
        except ValueError:  # the delta-method SE is NaN inside the bracket: keep grid[i]
            pass
    return {"available": True, "loq": xq, **base}


def _working_range(cal: Calibration, limits: dict[str, Any]) -> dict[str, Any]:
    x_lo, x_hi = cal.x_fit_range
    loq = _num(limits.get("loq"))
    lowest = _lowest_positive(cal)
    if np.isfinite(loq):
        low = max(loq, lowest)
        basis = f"from max(LOQ ({limits['method']}), lowest non-zero standard) to the highest standard"
    else:
        low = lowest
        basis = "lowest non-zero standard to the highest standard (LOQ not available)"
    return {"low": low, "high": x_hi, "basis": basis, "empty": bool(low > x_hi)}


def fit_calibration(x: ArrayLike, y: ArrayLike, *, model: str = "auto", weights: Any = None,
                    level: float = 0.95, units: str = "", blanks: ArrayLike | None = None,
                    y_se: ArrayLike | None = None, response_units: str = "",
                    options: CalibrationOptions | None = None) -> Calibration:
    """Fit a calibration to standards.

    Parameters
    ----------
    x : (n,) array_like
        Concentrations of the standards (>= 0; a standard at 0 is a blank that is fitted).
    y : (n,) array_like
        Their responses (one reading each; replicates as repeated x).
    model : {"auto", "linear", "wls", "quadratic", "power", "4pl", "5pl"}
        ``linear`` with weights becomes ``wls``.
    weights : {None, "1/x2", "1/y2", "1/var"} or (n,) array_like
        ``1/var`` uses 1 / y_se^2 when ``y_se`` is given for every standard, else the
        inverse replicate variance of each concentration.
    level : float
        Default confidence level of intervals.
    units : str
        Concentration units (printed everywhere).
    blanks : (k,) array_like, optional
        Extra blank responses used for the blank-based LOD only (not fitted). Without
        them, the readings at x = 0 are the blanks.
    y_se : (n,) array_like, optional
        Measurement SE of each standard's response.
    response_units : str
        Response units.
    options : CalibrationOptions, optional
        Limits and test settings.

    Returns
    -------
    Calibration

    Raises
    ------
    CalibrationError
        Unknown model, NaN or negative concentrations, too few distinct concentrations,
        constant responses, or a fit that fails.
    """
    xa = _as_float_array(x, "concentration")
    ya = _as_float_array(y, "response")
    if xa.size != ya.size:
        raise CalibrationError(f"x has {xa.size} values but y has {ya.size}")
    se = np.full(xa.shape, np.nan) if y_se is None else \
        np.broadcast_to(np.asarray(y_se, float), xa.shape).astype(float)
    role = np.full(xa.shape, "standard", dtype=object)
    if blanks is not None:
        ba = _as_float_array(blanks, "blanks")
        xa = np.concatenate([xa, np.zeros(ba.size)])
        ya = np.concatenate([ya, ba])
        se = np.concatenate([se, np.full(ba.size, np.nan)])
        role = np.concatenate([role, np.full(ba.size, "blank", dtype=object)])
        opts = options or CalibrationOptions()
        if opts.include_blanks is None:
            options = dataclasses.replace(opts, include_blanks=False)
    args = {"model": model, "weights": weights if isinstance(weights, (str, type(None))) else "given",
            "level": level, "units": units, "response_units": response_units}
    return _calibrate(xa, ya, role.astype(str), se, model=model, weights=weights, level=level,
                      units=units, response_units=response_units, options=options, path=None,
                      function="fit_calibration", arguments=args)


# ============================================================================ tables and files
def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV or Parquet table (one row per reading); see :mod:`ecl_quant._calio`."""
    from ._calio import read_table as _read

    return _read(path)


def calibrate_table(df: pd.DataFrame, *, x: str = "concentration", y: str = "response",
                    role: str = "role", se: str = "response_se", model: str = "auto",
                    weights: Any = None, level: float = 0.95, units: str = "",
                    response_units: str = "", options: CalibrationOptions | None = None,
                    path: str | Path | None = None) -> Calibration:
    """Fit a calibration to a table with one row per reading.

    Parameters
    ----------
    df : pandas.DataFrame
        Columns ``x`` (concentration) and ``y`` (response); optionally ``role``
        (``standard``, ``blank``, ``unknown``; unknowns are ignored here, blanks may leave
        the concentration empty) and ``se`` (measurement SE of each response, used for
        ``1/var`` weights). Without a role column, readings at concentration 0 are the
        blanks. Replicates are repeated rows.
    x, y, role, se : str
        Column names.
    model, weights, level, units, response_units, options
        As :func:`fit_calibration`.
    path : str or Path, optional
        The table's file, named in error messages and provenance.

    Returns
    -------
    Calibration

    Raises
    ------
    InputFormatError
        Missing columns, text or empty cells in numeric columns, unknown roles.
    CalibrationError
        As :func:`fit_calibration`.
    """
    from ._calio import numeric_column, require_column

    require_column(df, y, "--y", path=path)
    require_column(df, x, "--x", path=path)
    n_rows = len(df)
    if role in df.columns:
        roles = df[role].astype(str).str.strip().str.lower().to_numpy()
        bad = ~np.isin(roles, ROLES)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputFormatError(f"column {role!r} holds {df[role].iloc[i]!r} at data row "
                                   f"{i + 1}; use standard, blank or unknown", path=path)
    else:
        roles = np.full(n_rows, "standard", dtype=object)
    use = roles != "unknown"
    is_blank = roles == "blank"
    yv = numeric_column(df, y, rows=use, path=path)
    xv = numeric_column(df, x, rows=use & ~is_blank, path=path)
    xv_blank = numeric_column(df, x, rows=is_blank, allow_missing=True, path=path)
    nonzero = is_blank & np.isfinite(xv_blank) & (xv_blank != 0)
    if nonzero.any():
        i = int(np.flatnonzero(nonzero)[0])
        raise InputFormatError(f"blank at data row {i + 1} has concentration {xv_blank[i]:g}; "
                               "blanks must have concentration 0 or empty", path=path)
    xv = np.where(is_blank, 0.0, xv)
    sev = numeric_column(df, se, rows=use, allow_missing=True, path=path) if se in df.columns \
        else np.full(n_rows, np.nan)
    if not use.any():
        raise InputFormatError("the table has no standards or blanks (every role is unknown)",
                               path=path)
    neg = use & (xv < 0)
    if neg.any():
        i = int(np.flatnonzero(neg)[0])
        raise CalibrationError(f"negative concentration {xv[i]:g} at data row {i + 1}; "
                               "concentrations must be >= 0", path=path)
    args = {"x": x, "y": y, "role": role, "se": se, "model": model,
            "weights": weights if isinstance(weights, (str, type(None))) else "given",
            "level": level, "units": units, "response_units": response_units,
            "table": None if path is None else str(path),
            "options": dataclasses.asdict(options or CalibrationOptions())}
    try:
        cal = _calibrate(xv[use], yv[use],
                         np.where(is_blank[use], "blank", "standard").astype(str), sev[use],
                         model=model, weights=weights, level=level, units=units,
                         response_units=response_units, options=options, path=path,
                         function="calibrate_table", arguments=args)
    except CalibrationError as err:
        if err.path is None and path is not None:
            raise CalibrationError(err.reason, path=path) from err
        raise
    n_unknown = int((~use).sum())
    if n_unknown:
        cal = dataclasses.replace(cal, notes=cal.notes + (
            f"{n_unknown} row(s) with role unknown ignored by the fit",))
    return cal


def quantify_table(df: pd.DataFrame, cal: Calibration, *, y: str = "response",
                   sample: str = "sample", se: str = "response_se", role: str = "role",
                   method: str = "analytic", level: float | None = None, n_draws: int = 2000,
                   seed: int = 0, path: str | Path | None = None) -> pd.DataFrame:
    """Concentrations of every sample in a table, readings grouped by ``sample``.

    Parameters
    ----------
    df : pandas.DataFrame
        Column ``y`` (response); optional ``sample`` (rows with the same value are
        replicate readings of one sample; without it every row is its own sample),
        ``se`` (each reading's measurement SE) and ``role`` (carried to the output).
    cal : Calibration
    y, sample, se, role : str
        Column names.
    method : {"analytic", "bootstrap"}
    level : float, optional
    n_draws, seed : int
        Bootstrap settings (one set of refits is shared by all samples).
    path : str or Path, optional
        The table's file, for error messages.

    Returns
    -------
    pandas.DataFrame
        One row per sample: sample, [role], n, response_mean, response_sd, concentration,
        se, ci_low, ci_high, level, method, flags (';'-joined), units. ``attrs`` carries
        ``provenance`` (versions, settings, date, calibration hash).
    """
    from ._calio import numeric_column, require_column

    require_column(df, y, "--y", path=path)
    yv = numeric_column(df, y, path=path)
    sev = numeric_column(df, se, allow_missing=True, path=path) if se in df.columns else None
    if method not in ("analytic", "bootstrap"):
        raise CalibrationError(f"method {method!r} is not one of analytic, bootstrap", path=path)
    lvl = cal.level if level is None else float(level)
    if not 0 < lvl < 1:
        raise CalibrationError(f"level must lie in (0, 1), got {lvl}", path=path)
    if sample in df.columns:
        keys = df[sample].astype(str).to_numpy()
    else:
        keys = np.array([f"row{i + 1}" for i in range(len(df))])
    order = list(dict.fromkeys(keys.tolist()))
    groups, ses, roles = [], [], []
    for k in order:
        idx = np.flatnonzero(keys == k)
        groups.append(yv[idx])
        s = None if sev is None else sev[idx]
        ses.append(s if s is not None and np.all(np.isfinite(s)) else None)
        roles.append(str(df[role].iloc[idx[0]]) if role in df.columns else None)
    try:
        preds = cal._predict_groups(groups, ses, method=method, level=lvl, weight=None,
                                    n_draws=n_draws, seed=seed)
    except CalibrationError as err:
        if err.path is None and path is not None:
            raise CalibrationError(err.reason, path=path) from err
        raise
    rows = []
    for k, grp, rl, pr in zip(order, groups, roles, preds):
        row: dict[str, Any] = {"sample": k}
        if role in df.columns:
            row["role"] = rl
        row.update({"n": pr.n_readings, "response_mean": pr.response_mean,
                    "response_sd": float(np.std(grp, ddof=1)) if grp.size > 1 else float("nan"),
                    "concentration": pr.concentration, "se": pr.se, "ci_low": pr.ci_low,
                    "ci_high": pr.ci_high, "level": pr.level, "method": pr.method,
                    "flags": pr.flags_text, "units": cal.units})
        rows.append(row)
    cols = ["sample"] + (["role"] if role in df.columns else []) + [
        "n", "response_mean", "response_sd", "concentration", "se", "ci_low", "ci_high",
        "level", "method", "flags", "units"]
    out = pd.DataFrame(rows, columns=cols)
    out.attrs["provenance"] = _provenance("quantify_table", {
        "y": y, "sample": sample, "se": se, "method": method, "level": lvl,
        "n_draws": n_draws if method == "bootstrap" else None, "seed": seed,
        "table": None if path is None else str(path),
        "calibration_sha256": calibration_hash(cal), "calibration_model": cal.model})
    return out


def calibration_hash(cal: Calibration) -> str:
    """SHA-256 of the calibration document (the ``sha256`` written by save_calibration)."""
    from ._calio import canonical_hash

    return canonical_hash(cal.to_dict())


def save_calibration(cal: Calibration, path: str | Path) -> str:
    """Write ``calibration.json`` (schema-checked, with its sha256) atomically.

    Returns
    -------
    str
        The sha256 written.
    """
    from ._calio import canonical_hash, check_schema
    from ._io import write_json_atomic

    doc = cal.to_dict()
    digest = canonical_hash(doc)
    doc["sha256"] = digest
    check_schema(doc, path=path)
    write_json_atomic(path, doc)
    return digest


def load_calibration(path: str | Path) -> Calibration:
    """Read a calibration.json written by :func:`save_calibration`.

    Raises
    ------
    InputFormatError
        Missing file or not JSON.
    CalibrationError
        Not a calibration document, a newer format version, a schema violation (extra or
        missing keys), or a sha256 that does not match the content (edited file).
    """
    import json

    from ._calio import canonical_hash, check_schema

    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError as err:
        raise InputFormatError("no such calibration file; create it with `ecl-quant calibrate`",
                               path=p) from err
    except (OSError, UnicodeDecodeError) as err:
        raise InputFormatError(f"cannot read the calibration file ({err})", path=p) from err
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as err:
        raise InputFormatError(f"not valid JSON ({err.msg} at line {err.lineno}); the file is "
                               "damaged: refit with `ecl-quant calibrate`", path=p) from err
    if not isinstance(doc, dict) or doc.get("format") != FORMAT_NAME:
        raise CalibrationError(f"not an ecl_quant calibration file (format must be "
                               f"{FORMAT_NAME!r}); give the calibration.json written by "
                               "`ecl-quant calibrate`", path=p)
    version = doc.get("version")
    if not isinstance(version, int) or isinstance(version, bool):
        raise CalibrationError(f"format version {version!r} is not an integer", path=p)
    if version > FORMAT_VERSION:
        raise CalibrationError(f"written by a newer ecl_quant (format version {version}; this "
                               f"version reads {FORMAT_VERSION}); upgrade ecl_quant", path=p)
    if version < 1:
        raise CalibrationError(f"format version {version} is not supported", path=p)
    check_schema(doc, path=p)
    try:
        digest = canonical_hash(doc)
    except ValueError as err:  # NaN or Infinity: never written by save_calibration
        raise CalibrationError("holds NaN or Infinity, which a saved calibration never does: "
                               "the file was edited; refit with `ecl-quant calibrate`",
                               path=p) from err
    if digest != doc["sha256"]:
        raise CalibrationError("content does not match its sha256: the file was edited or "
                               "damaged; refit with `ecl-quant calibrate`", path=p)
    try:
        cal = Calibration.from_dict(doc)
    except (KeyError, TypeError, ValueError) as err:
        raise CalibrationError(f"inconsistent calibration file ({err})", path=p) from err
    p_n = len(cal.param_names)
    if cal.model not in MODELS or MODELS[cal.model].param_names != cal.param_names or \
            cal.covariance.shape != (p_n, p_n) or not np.all(np.isfinite(cal.params)):
        raise CalibrationError("inconsistent calibration file (model, parameters and "
                               "covariance do not agree)", path=p)
    return cal


def plot_calibration(cal: Calibration, path: str | Path | None = None, *,
                     level: float | None = None, dpi: int = 110) -> bytes:
    """Write (when ``path`` is given) and return calibration.png as bytes.

    Data, fit, confidence band of the mean response and prediction band of one reading
    at ``level``, LOD/LOQ lines, and a panel of standardized residuals.
    """
    from ._calplot import plot_calibration as _plot

    return _plot(cal, path, level=level, dpi=dpi)
