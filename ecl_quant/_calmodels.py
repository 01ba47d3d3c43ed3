"""Calibration model functions and fitting (private helper of :mod:`ecl_quant.calibration`).

Every model is described in its *fit space*: concentrations ``u`` and responses ``v``
after the model's transform (identity, or natural logs for the power law, which is a
straight line in log-log). All functions broadcast over a leading batch axis of the
parameter array, so a bootstrap refits thousands of draws in one call.

Models linear in their parameters (line, quadratic, power law in logs) are solved by a
QR decomposition of the column-scaled, weight-scaled design matrix, never by the normal
equations (NIST StRD Pontius has x^2 up to 9e12). The logistic models are fitted by
bounded trust-region least squares on scaled data (scipy.optimize.least_squares) from
data-driven starting values; a fit that does not converge, or that ends on a bound,
raises :class:`~ecl_quant.errors.CalibrationError`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import optimize

from .errors import CalibrationError

FloatArray = NDArray[np.float64]

__all__ = ["ModelDef", "MODELS", "FitResult", "fit_model", "batch_refit"]


# ----------------------------------------------------------------------------- models
def _poly_f(theta: FloatArray, u: FloatArray) -> FloatArray:
    theta = np.asarray(theta, float)
    p = theta.shape[-1]
    out = np.zeros(np.broadcast_shapes(theta.shape[:-1] + (1,), np.shape(u)), float)
    for k in range(p - 1, -1, -1):  # Horner
        out = out * u + theta[..., k, None]
    return out


def _poly_jac(theta: FloatArray, u: FloatArray) -> FloatArray:
    theta = np.asarray(theta, float)
    p = theta.shape[-1]
    u = np.asarray(u, float)
    shape = np.broadcast_shapes(theta.shape[:-1] + (1,), u.shape)
    return np.stack([np.broadcast_to(u**k, shape) for k in range(p)], axis=-1)


def _poly_dfdu(theta: FloatArray, u: FloatArray) -> FloatArray:
    theta = np.asarray(theta, float)
    p = theta.shape[-1]
    out = np.zeros(np.broadcast_shapes(theta.shape[:-1] + (1,), np.shape(u)), float)
    for k in range(p - 1, 0, -1):
        out = out * u + k * theta[..., k, None]
    return out


def _line_inv(theta: FloatArray, v: FloatArray, branch: float = 1.0) -> FloatArray:
    theta = np.asarray(theta, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (np.asarray(v, float) - theta[..., 0, None]) / theta[..., 1, None]


def _quad_inv(theta: FloatArray, v: FloatArray, branch: float = 1.0) -> FloatArray:
    """Root of c0 + c1 u + c2 u^2 = v on the branch whose slope has sign ``branch``.

    Uses x = 2 (v - c0) / (c1 + branch * sqrt(D)), D = c1^2 - 4 c2 (c0 - v), which has
    no cancellation when c2 is small; D < 0 (response beyond the vertex) gives NaN.
    """
    theta = np.asarray(theta, float)
    c0, c1, c2 = theta[..., 0, None], theta[..., 1, None], theta[..., 2, None]
    v = np.asarray(v, float)
    disc = c1 * c1 - 4.0 * c2 * (c0 - v)
    with np.errstate(divide="ignore", invalid="ignore"):
        root = np.sqrt(np.where(disc >= 0, disc, np.nan))
        return 2.0 * (v - c0) / (c1 + branch * root)


def _logistic_parts(theta: FloatArray, u: FloatArray, five: bool) -> tuple[FloatArray, ...]:
    theta = np.asarray(theta, float)
    a = theta[..., 0, None]
    b = theta[..., 1, None]
    c = theta[..., 2, None]
    d = theta[..., 3, None]
    g = theta[..., 4, None] if five else np.ones_like(a)
    u = np.asarray(u, float)
    ratio = u / c
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        z = np.where(ratio > 0, ratio, 1.0) ** b
        z = np.where(ratio > 0, z, 0.0)
        q = 1.0 + z
        qg = q ** (-g)
    return a, b, c, d, g, ratio, z, q, qg


def _logistic_f(five: bool) -> Callable[[FloatArray, FloatArray], FloatArray]:
    def f(theta: FloatArray, u: FloatArray) -> FloatArray:
        a, b, c, d, g, ratio, z, q, qg = _logistic_parts(theta, u, five)
        return d + (a - d) * qg

    return f


def _logistic_jac(five: bool) -> Callable[[FloatArray, FloatArray], FloatArray]:
    def jac(theta: FloatArray, u: FloatArray) -> FloatArray:
        a, b, c, d, g, ratio, z, q, qg = _logistic_parts(theta, u, five)
        with np.errstate(divide="ignore", invalid="ignore"):
            dfdz = -(a - d) * g * qg / q
            logr = np.log(np.where(ratio > 0, ratio, 1.0))
        dz_db = np.where(ratio > 0, z * logr, 0.0)
        dz_dc = -b * z / c
        cols = [qg, dfdz * dz_db, dfdz * dz_dc, 1.0 - qg]
        if five:
            cols.append(-(a - d) * qg * np.log(q))
        shape = np.broadcast_shapes(*(np.shape(col) for col in cols))
        return np.stack([np.broadcast_to(col, shape) for col in cols], axis=-1)

    return jac


def _logistic_dfdu(five: bool) -> Callable[[FloatArray, FloatArray], FloatArray]:
    def dfdu(theta: FloatArray, u: FloatArray) -> FloatArray:
        a, b, c, d, g, ratio, z, q, qg = _logistic_parts(theta, u, five)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            dfdz = -(a - d) * g * qg / q
            # dz/du = (b / c) * ratio^(b - 1); at u = 0 it is 0 for b > 1, b/c for b = 1
            base = np.where(ratio > 0, ratio, 1.0) ** (b - 1.0)
            at_zero = np.where(b > 1, 0.0, np.where(b == 1, 1.0, np.inf))
            dz_du = (b / c) * np.where(ratio > 0, base, at_zero)
        return dfdz * dz_du

    return dfdu


def _logistic_inv(five: bool) -> Callable[..., FloatArray]:
    def inv(theta: FloatArray, v: FloatArray, branch: float = 1.0) -> FloatArray:
        theta = np.asarray(theta, float)
        a = theta[..., 0, None]
        b = theta[..., 1, None]
        c = theta[..., 2, None]
        d = theta[..., 3, None]
        g = theta[..., 4, None] if five else 1.0
        v = np.asarray(v, float)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            ratio = (a - d) / (v - d)
            inner = np.where(ratio > 0, ratio, np.nan) ** (1.0 / g) - 1.0
            x = c * np.where(inner >= 0, inner, np.nan) ** (1.0 / b)
        return np.where(np.isfinite(x), x, np.nan)

    return inv


@dataclass(frozen=True)
class ModelDef:
    """One calibration model in fit space.

    Attributes
    ----------
    name : str
        Model key used in files and on the command line.
    param_names : tuple of str
        Names of the public parameters, in order.
    description : str
        The formula in words, for reports.
    log_space : bool
        True for the power law: the fit is a line of ln(response) on ln(concentration).
    linear_in_params : bool
        Solved in closed form by QR (True) or iteratively (False).
    min_levels : int
        Fewest distinct concentrations accepted (parameters + 1).
    f, jac, dfdu, inv : callables
        Model value, Jacobian (..., n, p), slope d f / d u, and inverse v -> u, all in fit
        space and broadcasting over leading parameter axes.
    degree : int
        Polynomial degree for models linear in their parameters (else 0).
    """

    name: str
    param_names: tuple[str, ...]
    description: str
    log_space: bool
    linear_in_params: bool
    min_levels: int
    f: Callable[[FloatArray, FloatArray], FloatArray]
    jac: Callable[[FloatArray, FloatArray], FloatArray]
    dfdu: Callable[[FloatArray, FloatArray], FloatArray]
    inv: Callable[..., FloatArray]
    degree: int = 0

    @property
    def n_params(self) -> int:
        """Number of fitted parameters."""
        return len(self.param_names)


MODELS: dict[str, ModelDef] = {
    "linear": ModelDef("linear", ("intercept", "slope"), "y = intercept + slope * x",
                       False, True, 3, _poly_f, _poly_jac, _poly_dfdu, _line_inv, 1),
    "wls": ModelDef("wls", ("intercept", "slope"), "y = intercept + slope * x (weighted)",
                    False, True, 3, _poly_f, _poly_jac, _poly_dfdu, _line_inv, 1),
    "quadratic": ModelDef("quadratic", ("c0", "c1", "c2"), "y = c0 + c1 * x + c2 * x^2",
                          False, True, 4, _poly_f, _poly_jac, _poly_dfdu, _quad_inv, 2),
    "power": ModelDef("power", ("a", "b"), "y = a * x^b (line of ln y on ln x)",
                      True, True, 3, _poly_f, _poly_jac, _poly_dfdu, _line_inv, 1),
    "4pl": ModelDef("4pl", ("a", "b", "c", "d"),
                    "y = d + (a - d) / (1 + (x / c)^b); a at x = 0, d at x -> inf, c inflection",
                    False, False, 5, _logistic_f(False), _logistic_jac(False),
                    _logistic_dfdu(False), _logistic_inv(False)),
    "5pl": ModelDef("5pl", ("a", "b", "c", "d", "g"),
                    "y = d + (a - d) / (1 + (x / c)^b)^g; g asymmetry",
                    False, False, 6, _logistic_f(True), _logistic_jac(True),
                    _logistic_dfdu(True), _logistic_inv(True)),
}


def public_to_fit(model: ModelDef, params: FloatArray, cov: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Public parameters and covariance -> fit-space ones (power: (ln a, b))."""
    params = np.asarray(params, float)
    cov = np.asarray(cov, float)
    if model.log_space:
        jac = np.diag([1.0 / params[0], 1.0])
        return np.array([np.log(params[0]), params[1]]), jac @ cov @ jac.T
    return params.copy(), cov.copy()


def fit_to_public(model: ModelDef, theta: FloatArray, cov: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Fit-space parameters and covariance -> public ones (delta method, exact for ln)."""
    theta = np.asarray(theta, float)
    cov = np.asarray(cov, float)
    if model.log_space:
        a = float(np.exp(theta[0]))
        jac = np.diag([a, 1.0])
        return np.array([a, theta[1]]), jac @ cov @ jac.T
    return theta.copy(), cov.copy()


# ------------------------------------------------------------------------------ fitting
@dataclass(frozen=True, eq=False)
class FitResult:
    """Least-squares solution in fit space.

    ``cov_unscaled`` is (J^T W J)^-1; the parameter covariance is s2 * cov_unscaled.
    """

    theta: FloatArray
    cov_unscaled: FloatArray
    residuals: FloatArray
    sse_w: float
    df: int
    n_iter: int = 0
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def s2(self) -> float:
        """Residual variance (weighted SSE / df)."""
        return self.sse_w / self.df if self.df > 0 else float("nan")


def _upper_inverse(r: FloatArray) -> FloatArray:
    """Inverse of a small upper-triangular matrix by back substitution."""
    p = r.shape[0]
    inv = np.zeros_like(r)
    for i in range(p - 1, -1, -1):
        inv[i, i] = 1.0 / r[i, i]
        for j in range(i + 1, p):
            inv[i, j] = -(r[i, i + 1:j + 1] @ inv[i + 1:j + 1, j]) / r[i, i]
    return inv


def _fit_linear_params(degree: int, u: FloatArray, v: FloatArray, w: FloatArray) -> FitResult:
    scale = float(np.max(np.abs(u))) or 1.0
    t = u / scale
    x_s = np.vander(t, degree + 1, increasing=True)
    sw = np.sqrt(w)
    q, r = np.linalg.qr(x_s * sw[:, None])
    diag = np.abs(np.diag(r))
    if diag.min() <= diag.max() * 1e-13:
        raise CalibrationError("the design matrix is rank deficient: the concentrations do "
                               "not support this many parameters")
    r_inv = _upper_inverse(r)
    coef_s = r_inv @ (q.T @ (v * sw))
    cov_s = r_inv @ r_inv.T
    dscale = scale ** -np.arange(degree + 1, dtype=float)
    theta = coef_s * dscale
    resid = v - x_s @ coef_s
    sse = float(np.sum(w * resid**2))
    proj = r_inv @ q.T  # (p, n): theta_s = proj @ (v * sw)
    return FitResult(theta, cov_s * np.outer(dscale, dscale), resid, sse, len(u) - degree - 1,
                     extra={"proj": (proj * sw[None, :]) * dscale[:, None],
                            "leverage": np.sum(q**2, axis=1)})


# Logistic fits work on scaled data: u_s = u / u_ref, v_s = (v - v_lo) / v_span, with the
# internal parameters (a_s, ln b, ln c_s, d_s[, ln g]) so that b, c, g stay positive.
_B_BOUNDS = (0.05, 50.0)
_G_BOUNDS = (0.05, 20.0)


def _int_to_theta(phi: FloatArray, five: bool, u_ref: float, v_lo: float, v_span: float) -> FloatArray:
    phi = np.asarray(phi, float)
    cols = [v_lo + v_span * phi[..., 0], np.exp(phi[..., 1]), u_ref * np.exp(phi[..., 2]),
            v_lo + v_span * phi[..., 3]]
    if five:
        cols.append(np.exp(phi[..., 4]))
    return np.stack(cols, axis=-1)


def _theta_to_int(theta: FloatArray, five: bool, u_ref: float, v_lo: float, v_span: float) -> FloatArray:
    theta = np.asarray(theta, float)
    cols = [(theta[..., 0] - v_lo) / v_span, np.log(theta[..., 1]), np.log(theta[..., 2] / u_ref),
            (theta[..., 3] - v_lo) / v_span]
    if five:
        cols.append(np.log(theta[..., 4]))
    return np.stack(cols, axis=-1)


def _int_bounds(five: bool, u_pos_min: float, u_ref: float) -> tuple[FloatArray, FloatArray]:
    lo = [-np.inf, np.log(_B_BOUNDS[0]), np.log(u_pos_min / u_ref / 1e3), -np.inf]
    hi = [np.inf, np.log(_B_BOUNDS[1]), np.log(1e3), np.inf]
    if five:
        lo.append(np.log(_G_BOUNDS[0]))
        hi.append(np.log(_G_BOUNDS[1]))
    return np.array(lo), np.array(hi)


def _int_jac(model: ModelDef, phi: FloatArray, u_s: FloatArray) -> FloatArray:
    """Jacobian of the scaled model with respect to the internal parameters."""
    five = model.n_params == 5
    th = _int_to_theta(phi, five, 1.0, 0.0, 1.0)  # scaled space: identity scaling
    jac = model.jac(th, u_s)
    mult = [np.ones_like(th[..., 0]), th[..., 1], th[..., 2], np.ones_like(th[..., 0])]
    if five:
        mult.append(th[..., 4])
    return jac * np.stack(mult, axis=-1)[..., None, :]


def _logistic_starts(u: FloatArray, v: FloatArray, five: bool) -> list[FloatArray]:
    """Data-driven starting values in scaled space (u_s, v_s in [0, 1]), in groups.

    The asymptotes start a little beyond the lowest and highest level means; slope and
    inflection come from the linearised model ln((v - a)/(d - v)) = b ln u - b ln c.
    The second group (asymptotes further out) is tried only when the first fails.
    """
    levels = np.unique(u)
    means = np.array([v[u == lv].mean() for lv in levels])
    lo_mean, hi_mean = means[0], means[-1]
    rising = hi_mean >= lo_mean
    pos = levels > 0
    starts: list[list[FloatArray]] = []
    for margin in (0.05, 0.3):
        group: list[FloatArray] = []
        starts.append(group)
        a0 = lo_mean - margin * (1 if rising else -1) * abs(hi_mean - lo_mean)
        d0 = hi_mean + margin * (1 if rising else -1) * abs(hi_mean - lo_mean)
        # linearised 4PL: ln((v - a)/(d - v)) = b ln u - b ln c on the positive levels
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = (means - a0) / (d0 - means)
        ok = pos & (ratio > 0) & np.isfinite(ratio)
        b0, c0 = 1.0, float(np.exp(np.mean(np.log(levels[pos])))) if pos.any() else 0.5
        if ok.sum() >= 2:
            slope, icpt = np.polyfit(np.log(levels[ok]), np.log(ratio[ok]), 1)
            if np.isfinite(slope) and slope > 0:
                b0 = float(np.clip(slope, 0.2, 10.0))
                c0 = float(np.exp(-icpt / slope))
        c_lo, c_hi = levels[pos].min() / 100 if pos.any() else 1e-3, 100.0
        c0 = float(np.clip(c0, c_lo, c_hi))
        for b_try in dict.fromkeys((b0, 1.0)):
            th = [a0, b_try, c0, d0] + ([1.0] if five else [])
            group.append(np.array(th, float))
    return starts


def _fit_logistic(model: ModelDef, u: FloatArray, v: FloatArray, w: FloatArray,
                  start: FloatArray | None = None) -> FitResult:
    five = model.n_params == 5
    u_ref = float(u.max())
    v_lo = float(v.min())
    v_span = float(np.ptp(v)) or 1.0
    u_s = u / u_ref
    v_s = (v - v_lo) / v_span
    w_n = w / w.mean()
    sw = np.sqrt(w_n)
    u_pos_min = float(u[u > 0].min())
    lo, hi = _int_bounds(five, u_pos_min, u_ref)

    def resid(phi: FloatArray) -> FloatArray:
        th = _int_to_theta(phi, five, 1.0, 0.0, 1.0)
        return sw * (model.f(th, u_s) - v_s)

    def jac(phi: FloatArray) -> FloatArray:
        return sw[:, None] * _int_jac(model, phi, u_s)

    if start is not None:
        st = np.asarray(start, float).copy()
        starts = [[np.concatenate([[(st[0] - v_lo) / v_span, st[1], st[2] / u_ref,
                                    (st[3] - v_lo) / v_span], st[4:]])]]
    else:
        starts = _logistic_starts(u_s, v_s, five)
    best = None
    messages: list[str] = []
    for group in starts:
        best = _best_of(group, best, resid, jac, lo, hi, five, model, messages)
        if best is not None:
            break
    if best is None:
        detail = "; ".join(dict.fromkeys(messages)) or "no start converged"
        raise CalibrationError(
            f"{model.name} fit did not converge ({detail}); the standards do not define a "
            "sigmoid (add standards on both plateaus, or use a line or quadratic on the "
            "working range)")
    theta = _int_to_theta(best.x, five, u_ref, v_lo, v_span)
    c_fit = float(theta[2])
    if c_fit > 10 * u_ref or c_fit < u_pos_min / 10:
        where = "above the highest" if c_fit > 10 * u_ref else "below the lowest non-zero"
        raise CalibrationError(
            f"{model.name} fit is degenerate: its inflection c = {c_fit:.4g} lies more than ten "
            f"times {where} standard, so the data show no sigmoid (no plateau); use a line, "
            "quadratic or power law, or add standards")
    jac_full = model.jac(theta, u) * np.sqrt(w)[:, None]
    svals = np.linalg.svd(jac_full, compute_uv=False)
    if not np.all(np.isfinite(svals)) or svals.min() <= svals.max() * 1e-12:
        raise CalibrationError(f"{model.name} fit is not identifiable (singular Jacobian): "
                               "the data do not constrain every parameter")
    q, r = np.linalg.qr(jac_full)
    r_inv = _upper_inverse(r)
    cov_u = r_inv @ r_inv.T
    residuals = v - model.f(theta, u)
    sse = float(np.sum(w * residuals**2))
    return FitResult(theta, cov_u, residuals, sse, len(u) - model.n_params, n_iter=int(best.nfev),
                     extra={"leverage": np.sum(q**2, axis=1),
                            "scaling": (u_ref, v_lo, v_span), "bounds": (lo, hi)})


def _best_of(group: list[FloatArray], best: Any, resid: Callable[[FloatArray], FloatArray],
             jac: Callable[[FloatArray], FloatArray], lo: FloatArray, hi: FloatArray, five: bool,
             model: ModelDef, messages: list[str], first_only: bool = True) -> Any:
    """Run least_squares from the starts of a group in turn.

    With ``first_only`` the first converged start is kept (the data-driven start almost
    always reaches the minimum); otherwise the lowest cost of all converged starts.
    """
    for st in group:
        phi0 = np.array([st[0], np.log(st[1]), np.log(st[2]), st[3]]
                        + ([np.log(st[4])] if five else []))
        phi0 = np.clip(phi0, lo + 1e-9, hi - 1e-9)
        try:
            with np.errstate(all="ignore"):
                res = optimize.least_squares(resid, phi0, jac=jac, bounds=(lo, hi), method="trf",
                                             x_scale="jac", ftol=1e-12, xtol=1e-12, gtol=1e-12,
                                             max_nfev=200)
        except (ValueError, np.linalg.LinAlgError) as err:  # non-finite model values
            messages.append(str(err))
            continue
        if res.status <= 0 or not np.all(np.isfinite(res.x)):
            messages.append(str(res.message))
            continue
        if np.any(res.active_mask != 0):
            names = [model.param_names[i] for i in np.flatnonzero(res.active_mask)]
            messages.append(f"ended on the bound of {', '.join(names)}")
            continue
        if best is None or res.cost < best.cost:
            best = res
        if first_only:
            break
    return best


def fit_model(model: ModelDef, u: FloatArray, v: FloatArray, w: FloatArray) -> FitResult:
    """Weighted least-squares fit of ``model`` in fit space.

    Parameters
    ----------
    model : ModelDef
    u, v : (n,) ndarray of float64
        Concentrations and responses in fit space.
    w : (n,) ndarray of float64
        Positive weights (proportional to 1 / variance).

    Raises
    ------
    CalibrationError
        Rank-deficient design, no convergence, or a parameter on its bound.
    """
    if model.linear_in_params:
        return _fit_linear_params(model.degree, u, v, w)
    return _fit_logistic(model, u, v, w)


def batch_refit(model: ModelDef, fit: FitResult, u: FloatArray, v_star: FloatArray,
                w: FloatArray, *, n_iter: int = 40) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Refit many simulated response vectors at once (parametric bootstrap).

    Parameters
    ----------
    model : ModelDef
    fit : FitResult
        The original fit (supplies the projection for linear models and the start).
    u : (n,) ndarray
        Concentrations in fit space.
    v_star : (B, n) ndarray
        Simulated responses in fit space.
    w : (n,) ndarray
        Weights.
    n_iter : int
        Levenberg-Marquardt iterations for the logistic models.

    Returns
    -------
    theta : (B, p) ndarray
    s2 : (B,) ndarray
        Residual variance of each refit.
    cov_unscaled : (B, p, p) ndarray
    ok : (B,) ndarray of bool
        False where an iterative refit did not converge.
    """
    n_draws = v_star.shape[0]
    p = model.n_params
    if model.linear_in_params:
        proj = fit.extra["proj"]
        theta = v_star @ proj.T
        resid = v_star - model.f(theta, u)
        s2 = np.sum(w * resid**2, axis=1) / fit.df
        cov = np.broadcast_to(fit.cov_unscaled, (n_draws, p, p))
        return theta, s2, cov, np.ones(n_draws, bool)
    five = p == 5
    u_ref, v_lo, v_span = fit.extra["scaling"]
    lo, hi = fit.extra["bounds"]
    u_s = u / u_ref
    v_s = (v_star - v_lo) / v_span
    sw = np.sqrt(w / w.mean())
    phi = np.broadcast_to(_theta_to_int(fit.theta, five, u_ref, v_lo, v_span), (n_draws, p)).copy()

    def evaluate(ph: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        th = _int_to_theta(ph, five, 1.0, 0.0, 1.0)
        r = sw * (model.f(th, u_s) - v_s)
        jj = sw[None, :, None] * _int_jac(model, ph, u_s)
        return r, jj, np.sum(r**2, axis=1)

    r, jj, cost = evaluate(phi)
    lam = np.full(n_draws, 1e-3)
    done = np.zeros(n_draws, bool)
    eye = np.eye(p)
    for _ in range(n_iter):
        jtj = np.einsum("bni,bnj->bij", jj, jj)
        grad = np.einsum("bni,bn->bi", jj, r)
        dg = np.einsum("bii->bi", jtj)
        a_mat = jtj + lam[:, None, None] * (dg[:, :, None] * eye + 1e-12 * eye)
        with np.errstate(all="ignore"):
            try:
                step = -np.linalg.solve(a_mat, grad[..., None])[..., 0]
            except np.linalg.LinAlgError:
                step = -np.einsum("bij,bj->bi", np.linalg.pinv(a_mat), grad)
        step = np.where(np.isfinite(step), step, 0.0)
        phi_new = np.clip(phi + step, lo, hi)
        with np.errstate(all="ignore"):
            r_new, jj_new, cost_new = evaluate(phi_new)
        better = np.isfinite(cost_new) & (cost_new <= cost)
        small = better & (cost - cost_new <= 1e-12 * (cost + 1e-30)) & \
            (np.max(np.abs(phi_new - phi), axis=1) < 1e-7)
        phi[better] = phi_new[better]
        r[better] = r_new[better]
        jj[better] = jj_new[better]
        cost[better] = cost_new[better]
        lam = np.where(better, np.maximum(lam / 3.0, 1e-9), np.minimum(lam * 4.0, 1e9))
        done |= small
        if done.all():
            break
    theta = _int_to_theta(phi, five, u_ref, v_lo, v_span)
    grad = np.einsum("bni,bn->bi", jj, r)
    gnorm = np.max(np.abs(grad), axis=1)
    at_bound = np.any((phi <= lo + 1e-9) | (phi >= hi - 1e-9), axis=1)
    ok = (done | (gnorm < 1e-8)) & ~at_bound & np.all(np.isfinite(theta), axis=1)
    resid = v_star - model.f(theta, u)
    s2 = np.sum(w * resid**2, axis=1) / fit.df
    jac_full = model.jac(theta, u) * np.sqrt(w)[None, :, None]
    jtj = np.einsum("bni,bnj->bij", jac_full, jac_full)
    with np.errstate(all="ignore"):
        cond_ok = np.linalg.cond(jtj) < 1e14
    cov = np.full((n_draws, p, p), np.nan)
    good = ok & cond_ok
    if good.any():
        cov[good] = np.linalg.inv(jtj[good])
    return theta, s2, cov, good
