"""Calibration models against general-purpose reference libraries and known truth.

References: statsmodels (OLS, WLS, anova_lm) and scipy.optimize.curve_fit as reference
libraries; Grubbs (1969) / DIN 32645 table of critical values (stored copy of the table);
simulated calibrations with known truth for the linearity tests and model selection.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import optimize, stats
from statsmodels.formula.api import ols
from statsmodels.stats.anova import anova_lm

from ecl_quant._calmodels import MODELS
from ecl_quant._calstats import grubbs_critical
from ecl_quant.calibration import calibrate_table, fit_calibration
from ecl_quant.errors import CalibrationError

DATA = Path(__file__).parent / "data"


def _massart3() -> tuple[np.ndarray, np.ndarray]:
    df = pd.read_csv(DATA / "massart97ex3.csv")
    return df["x"].to_numpy(float), df["y"].to_numpy(float)


def _logistic(x: np.ndarray, a: float, b: float, c: float, d: float, g: float = 1.0) -> np.ndarray:
    # 4PL / 5PL written out independently of the implementation
    return d + (a - d) / (1.0 + (x / c) ** b) ** g


def _sigmoid_data(seed: int, five: bool = False, noise: float = 0.25):
    rng = np.random.default_rng(seed)
    x = np.repeat([0.0, 0.5, 1, 2, 4, 8, 16, 32, 64], 3)
    th = (1.0, 1.4, 6.0, 25.0) + ((0.6,) if five else ())
    return x, _logistic(x, *th) + rng.normal(0, noise, x.size), th


# ---------------------------------------------------------------- statsmodels
def test_ols_line_matches_statsmodels() -> None:
    # statsmodels OLS: params, bse, R^2, log-likelihood; statsmodels' AIC counts only the
    # regression parameters, ours also counts sigma (+2).
    x, y = _massart3()
    cal = fit_calibration(x, y, model="linear")
    ref = sm.OLS(y, sm.add_constant(x)).fit()
    np.testing.assert_allclose(cal.params, ref.params, rtol=1e-12)
    np.testing.assert_allclose(np.sqrt(np.diag(cal.covariance)), ref.bse, rtol=1e-12)
    np.testing.assert_allclose(cal.covariance, ref.cov_params(), rtol=1e-12)
    np.testing.assert_allclose(cal.s_yx**2, ref.scale, rtol=1e-12)
    np.testing.assert_allclose(cal.r2, ref.rsquared, rtol=1e-12)
    np.testing.assert_allclose(cal.log_likelihood, ref.llf, rtol=1e-12)
    np.testing.assert_allclose(cal.aic, ref.aic + 2, rtol=1e-12)
    k, n = 3, len(x)
    np.testing.assert_allclose(cal.aicc, cal.aic + 2 * k * (k + 1) / (n - k - 1), rtol=1e-12)


@pytest.mark.parametrize("rule", ["1/x2", "1/y2", "1/var"])
def test_wls_matches_statsmodels(rule: str) -> None:
    # statsmodels WLS with the same weights computed here independently (1/var: replicate
    # variance per level, ddof = 1); 1/x2 leaves out the readings at x = 0.
    x, y = _massart3()
    cal = fit_calibration(x, y, model="wls", weights=rule)
    keep = x > 0 if rule == "1/x2" else np.ones_like(x, bool)
    if rule == "1/x2":
        w = 1.0 / x[keep] ** 2
        assert any("not fitted" in n for n in cal.notes)
    elif rule == "1/y2":
        w = 1.0 / y**2
    else:
        w = 1.0 / pd.Series(y).groupby(x).transform("var").to_numpy()
    ref = sm.WLS(y[keep], sm.add_constant(x[keep]), weights=w).fit()
    assert cal.model == "wls" and cal.weights == rule and cal.n == keep.sum()
    np.testing.assert_allclose(cal.params, ref.params, rtol=1e-11)
    np.testing.assert_allclose(cal.covariance, ref.cov_params(), rtol=1e-10)
    np.testing.assert_allclose(cal.s_yx**2, ref.scale, rtol=1e-11)
    np.testing.assert_allclose(cal.r2, ref.rsquared, rtol=1e-11)
    np.testing.assert_allclose(cal.log_likelihood, ref.llf, rtol=1e-11)
    np.testing.assert_allclose(cal.w[cal.in_fit], w, rtol=1e-14)


def test_wls_from_response_se_column() -> None:
    # calibrate_table with --weights 1/var and a response_se column: weights 1/se^2, as
    # statsmodels WLS (simulated standards with known SEs).
    rng = np.random.default_rng(5)
    x = np.repeat([0.0, 1, 2, 5, 10, 20], 2)
    se = 0.05 + 0.04 * x
    y = 0.3 + 1.7 * x + rng.normal(0, se)
    df = pd.DataFrame({"concentration": x, "response": y, "response_se": se})
    cal = calibrate_table(df, model="linear", weights="1/var")
    ref = sm.WLS(y, sm.add_constant(x), weights=1 / se**2).fit()
    assert cal.weight_source == "1 / response_se^2"
    np.testing.assert_allclose(cal.params, ref.params, rtol=1e-11)
    np.testing.assert_allclose(cal.covariance, ref.cov_params(), rtol=1e-10)


def test_quadratic_and_power_match_statsmodels() -> None:
    # statsmodels OLS on [1, x, x^2] and on (ln x, ln y) for the power law; the power law's
    # public parameter a = exp(intercept), its SE by the delta method.
    rng = np.random.default_rng(11)
    x = np.repeat([1.0, 2, 4, 8, 16, 32], 3)
    yq = 2.0 + 3.0 * x - 0.04 * x**2 + rng.normal(0, 0.5, x.size)
    cal = fit_calibration(x, yq, model="quadratic")
    ref = sm.OLS(yq, np.column_stack([np.ones_like(x), x, x**2])).fit()
    np.testing.assert_allclose(cal.params, ref.params, rtol=1e-10)
    np.testing.assert_allclose(cal.covariance, ref.cov_params(), rtol=1e-9)
    yp = 1.5 * x**0.8 * np.exp(rng.normal(0, 0.03, x.size))
    cal = fit_calibration(x, yp, model="power")
    ref = sm.OLS(np.log(yp), sm.add_constant(np.log(x))).fit()
    a = np.exp(ref.params[0])
    np.testing.assert_allclose(cal.params, [a, ref.params[1]], rtol=1e-11)
    np.testing.assert_allclose(cal.standard_errors["a"], a * ref.bse[0], rtol=1e-10)
    np.testing.assert_allclose(cal.standard_errors["b"], ref.bse[1], rtol=1e-10)
    np.testing.assert_allclose(cal.s_yx**2, ref.scale, rtol=1e-11)
    np.testing.assert_allclose(cal.inverse(cal.predict(7.0)), 7.0, rtol=1e-12)


def test_lack_of_fit_matches_statsmodels_anova() -> None:
    # Lack-of-fit F test = comparison of the line with the one-way (cell means) model:
    # statsmodels anova_lm(ols('y ~ x'), ols('y ~ C(x)')).
    x, y = _massart3()
    df = pd.DataFrame({"x": x, "y": y})
    table = anova_lm(ols("y ~ x", df).fit(), ols("y ~ C(x)", df).fit())
    lof = fit_calibration(x, y, model="linear").tests["lack_of_fit"]
    np.testing.assert_allclose(lof["F"], table["F"].iloc[1], rtol=1e-10)
    np.testing.assert_allclose(lof["p_value"], table["Pr(>F)"].iloc[1], rtol=1e-8)
    assert lof["df_lack_of_fit"] == 4 and lof["df_pure_error"] == 24
    assert lof["significant"]


# ---------------------------------------------------------------- scipy curve_fit
@pytest.mark.parametrize("five", [False, True])
@pytest.mark.parametrize("weighted", [False, True])
def test_logistic_matches_curve_fit(five: bool, weighted: bool) -> None:
    # scipy.optimize.curve_fit (Levenberg-Marquardt, absolute_sigma=False) from a start
    # near the truth: same minimum, same covariance s^2 (J' W J)^-1.
    x, y, th = _sigmoid_data(3, five=five, noise=0.12 if five else 0.25)
    w = 1.0 / (0.1 + 0.02 * y) ** 2 if weighted else None
    model = "5pl" if five else "4pl"
    cal = fit_calibration(x, y, model=model, weights=w)
    sigma = None if w is None else 1.0 / np.sqrt(w)
    popt, pcov = optimize.curve_fit(_logistic, x, y, p0=np.array(th) * 1.05, sigma=sigma,
                                    absolute_sigma=False, ftol=1e-14, xtol=1e-14, gtol=1e-14,
                                    maxfev=20000)
    np.testing.assert_allclose(cal.params, popt, rtol=1e-6)
    np.testing.assert_allclose(cal.covariance, pcov, rtol=1e-4, atol=1e-12)
    resid = y - _logistic(x, *popt)
    ww = np.ones_like(y) if w is None else w
    np.testing.assert_allclose(cal.s_yx, np.sqrt(np.sum(ww * resid**2) / (len(y) - len(th))),
                               rtol=1e-8)


def test_4pl_fails_clearly_without_plateaus() -> None:
    # A straight line (simulated) has no plateaus: the 4PL either runs to its bounds or
    # puts the inflection far outside the standards; both must be refused with a message.
    rng = np.random.default_rng(2)
    x = np.repeat([0.0, 1, 2, 3, 4, 5, 6], 2)
    y = 1 + 2 * x + rng.normal(0, 0.05, x.size)
    for model in ("4pl", "5pl"):
        with pytest.raises(CalibrationError, match=f"{model} fit (is degenerate|did not converge)"):
            fit_calibration(x, y, model=model)
    cal = fit_calibration(x, y, model="auto")  # auto records the failure and keeps the line
    assert cal.model == "linear"


def test_every_model_predicts_and_inverts() -> None:
    # inverse(predict(x)) = x and predict matches the formula (common practice).
    x, y, th = _sigmoid_data(8)
    for model in ("linear", "quadratic", "4pl", "5pl"):
        xs = x if model in ("4pl", "5pl") else x[x <= 8]
        ys = y if model in ("4pl", "5pl") else y[x <= 8]
        cal = fit_calibration(xs, ys, model=model)
        grid = np.linspace(0.5, xs.max() * 0.9, 7)
        np.testing.assert_allclose(cal.inverse(cal.predict(grid)), grid, rtol=1e-9)
        assert np.isfinite(cal.inverse(float(cal.predict(3.0))))
    cal = fit_calibration(x, y, model="4pl")
    a, b, c, d = cal.params
    np.testing.assert_allclose(cal.predict(x), _logistic(x, a, b, c, d), rtol=1e-13)
    assert np.isnan(cal.inverse(d + 5 * (d - a)))  # beyond the top asymptote: no solution


def test_model_jacobians_match_finite_differences() -> None:
    # Analytic Jacobians against central finite differences (common practice).
    u = np.array([0.0, 0.3, 1.0, 2.5, 7.0])
    for name, th in (("linear", [1.0, 2.0]), ("quadratic", [1.0, 2.0, -0.1]),
                     ("4pl", [1.0, 1.3, 2.0, 9.0]), ("5pl", [1.0, 1.3, 2.0, 9.0, 0.7])):
        mdef = MODELS[name]
        th = np.array(th)
        jac = mdef.jac(th, u)
        for k in range(len(th)):
            h = 1e-6 * max(1.0, abs(th[k]))
            tp, tm = th.copy(), th.copy()
            tp[k] += h
            tm[k] -= h
            np.testing.assert_allclose(jac[:, k], (mdef.f(tp, u) - mdef.f(tm, u)) / (2 * h),
                                       rtol=1e-6, atol=1e-8)
        up = u[1:]
        fd = (mdef.f(th, up + 1e-6) - mdef.f(th, up - 1e-6)) / 2e-6
        np.testing.assert_allclose(mdef.dfdu(th, up), fd, rtol=1e-6, atol=1e-8)


# ---------------------------------------------------------------- Grubbs
def test_grubbs_critical_values_match_table() -> None:
    # Grubbs (1969) critical values as tabulated (stored copy of the Grubbs/DIN 32645 table,
    # one-sided upper percentage points; the two-sided 5 % test uses the 2.5 % column).
    # The table prints two decimals; n = 5 (1.7150 by the formula) is printed as 1.71, so
    # the check allows 0.0051 (half a unit of the last printed digit, and that case).
    table = {3: 1.15, 5: 1.71, 10: 2.29, 20: 2.71}
    for n, g in table.items():
        assert abs(grubbs_critical(n, 0.05) - g) <= 0.0051
    assert abs(grubbs_critical(10, 0.02) - 2.41) <= 0.0051  # 1 % column
    assert grubbs_critical(3, 0.05) < (3 - 1) / np.sqrt(3)  # G cannot exceed (n-1)/sqrt(n)


def test_grubbs_false_alarm_rate_under_the_null() -> None:
    # Simulated normal replicates: the two-sided test at alpha = 0.05 rejects about 5 %
    # of the time (definition of the critical value; Monte Carlo, 40000 sets of 6).
    rng = np.random.default_rng(0)
    z = rng.standard_normal((40000, 6))
    g = np.max(np.abs(z - z.mean(1, keepdims=True)), axis=1) / z.std(1, ddof=1)
    rate = np.mean(g > grubbs_critical(6, 0.05))
    assert abs(rate - 0.05) < 0.006


def test_grubbs_flags_but_never_drops() -> None:
    # One gross outlier among replicates (simulated): flagged, kept in the fit.
    rng = np.random.default_rng(4)
    x = np.repeat([0.0, 2, 4, 6, 8, 10], 5)
    y = 1 + 2 * x + rng.normal(0, 0.1, x.size)
    y[17] += 3.0  # level 6, third replicate
    cal = fit_calibration(x, y, model="linear")
    assert cal.n == x.size and cal.in_fit.all()
    assert cal.outlier[17] and cal.outlier.sum() == 1
    assert cal.tests["grubbs"]["flagged_readings"] == [18]
    assert "no reading was removed" in cal.tests["grubbs"]["action"]
    level = [g for g in cal.tests["grubbs"]["levels"] if g["concentration"] == 6.0][0]
    assert level["outlier"] and level["G"] > level["G_crit"]
    ref = sm.OLS(y, sm.add_constant(x)).fit()  # the outlier stays in the estimate
    np.testing.assert_allclose(cal.params, ref.params, rtol=1e-12)


# ---------------------------------------------------------------- Mandel on simulated data
def test_mandel_rejects_known_curvature_and_accepts_a_line() -> None:
    # Simulated calibrations with known truth, 7 levels x 3: a true line is accepted about
    # 99 % of the time (P = 99 %); a response with clear curvature is rejected.
    rng = np.random.default_rng(21)
    x = np.repeat([0.0, 1, 2, 4, 6, 8, 10], 3)
    line_reject = curve_reject = 0
    n_sim = 150
    for _ in range(n_sim):
        y_line = 0.5 + 2.0 * x + rng.normal(0, 0.3, x.size)
        y_curve = 0.5 + 2.0 * x - 0.08 * x**2 + rng.normal(0, 0.3, x.size)
        line_reject += not fit_calibration(y=y_line, x=x, model="linear").tests["mandel"]["linear"]
        curve_reject += not fit_calibration(y=y_curve, x=x, model="linear").tests["mandel"]["linear"]
    assert line_reject / n_sim <= 0.04
    assert curve_reject / n_sim >= 0.95


def test_auto_keeps_a_line_and_explains() -> None:
    rng = np.random.default_rng(6)
    x = np.repeat([0.0, 1, 2, 4, 6, 8, 10], 3)
    cal = fit_calibration(x, 0.5 + 2.0 * x + rng.normal(0, 0.3, x.size), model="auto")
    assert cal.model == "linear"
    assert cal.selection["requested"] == "auto"
    assert "Mandel" in cal.selection["reason"] and "lack-of-fit" in cal.selection["reason"]


def test_auto_picks_a_sigmoid_for_saturating_data() -> None:
    # Simulated 4PL standards: the line is rejected and a logistic model wins on AICc.
    x, y, _ = _sigmoid_data(9)
    cal = fit_calibration(x, y, model="auto")
    assert cal.model in ("4pl", "5pl")
    assert "rejected" in cal.selection["reason"] and "AICc" in cal.selection["reason"]
    aiccs = {c["model"]: c["aicc"] for c in cal.selection["candidates"] if c["ok"]}
    assert aiccs[cal.model] == min(v for k, v in aiccs.items() if k != "linear")


def test_quadratic_turning_inside_range_is_refused() -> None:
    x = np.repeat([0.0, 2, 4, 6, 8, 10], 2)
    y = 1 + 4 * x - 0.4 * x**2 + np.tile([0.05, -0.05], 6)
    with pytest.raises(CalibrationError, match="turns over"):
        fit_calibration(x, y, model="quadratic")


def test_bootstrap_agrees_with_classical_for_a_line() -> None:
    # Parametric bootstrap (2000 studentized refits) against the classical s_x0 for a
    # well-determined line (Miller & Miller data): SE within 6 %, interval ends within 4 %.
    df = pd.read_csv(DATA / "miller_fluorescence.csv")
    cal = fit_calibration(df["x"], df["y"], model="linear")
    a = cal.inverse_predict(13.5)
    b = cal.inverse_predict(13.5, method="bootstrap", n_draws=2000, seed=1)
    assert b.method == "bootstrap" and b.n_draws == 2000 and b.n_failed == 0
    assert b.concentration == a.concentration
    assert abs(b.se / a.se - 1) < 0.06
    np.testing.assert_allclose([b.ci_low, b.ci_high], [a.ci_low, a.ci_high], rtol=0.04)
    again = cal.inverse_predict(13.5, method="bootstrap", n_draws=2000, seed=1)
    assert again == b  # reproducible with a seed


def test_unknown_measurement_se_is_combined() -> None:
    # y_se smaller than s_y/x leaves the classical result; a larger one replaces the reading
    # variance (common practice: the larger of the two, never both counted).
    df = pd.read_csv(DATA / "miller_fluorescence.csv")
    cal = fit_calibration(df["x"], df["y"], model="linear")
    base = cal.inverse_predict([13.5, 13.7])
    small = cal.inverse_predict([13.5, 13.7], y_se=0.1)
    assert small.se == base.se and small.variance_source == "calibration"
    big = cal.inverse_predict([13.5, 13.7], y_se=[1.0, 1.2])
    assert big.variance_source == "reading"
    b = cal.params[1]
    s_x0_sq = base.se**2 - cal.s_yx**2 / (2 * b**2)  # calibration part only
    np.testing.assert_allclose(big.se**2, s_x0_sq + (1.0**2 + 1.2**2) / 4 / b**2, rtol=1e-12)
    # Welch-Satterthwaite (GUM G.4): the known y_se part has infinite df, so df grows
    var_cal = s_x0_sq
    assert small.df == cal.df
    np.testing.assert_allclose(big.df, big.se**4 / (var_cal**2 / cal.df), rtol=1e-10)
