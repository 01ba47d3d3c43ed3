"""Coverage of the inverse-prediction intervals on simulated calibrations (known truth).

Over 1000 simulated calibrations each, the nominal 95 % interval for x0 must contain the
true concentration 93-97 % of the time (binomial SD at n = 1000 is 0.7 %):
- line, classical s_x0 (Miller & Miller) and the parametric bootstrap-t (2000 draws);
- 4PL, delta method;
- line with an unknown noisier than the standards, its own y_se given.
Simulated ground truth from fixed seeds (the project's own simulation of standards).
"""

from __future__ import annotations

import numpy as np

from ecl_quant.calibration import fit_calibration

N_SIM = 1000


def _covered(pred, x0: float) -> bool:
    return bool(pred.ci_low <= x0 <= pred.ci_high)


def test_line_coverage_classical_and_bootstrap() -> None:
    rng = np.random.default_rng(2024)
    x = np.repeat([0.0, 1, 2, 4, 6, 8, 10], 2)
    a, b, sigma, x0, m = 1.0, 2.0, 0.4, 3.3, 2
    hits_cl = hits_bs = 0
    for i in range(N_SIM):
        cal = fit_calibration(x, a + b * x + rng.normal(0, sigma, x.size), model="linear")
        y0 = a + b * x0 + rng.normal(0, sigma, m)
        hits_cl += _covered(cal.inverse_predict(y0), x0)
        hits_bs += _covered(cal.inverse_predict(y0, method="bootstrap", n_draws=2000, seed=i), x0)
    assert 0.93 <= hits_cl / N_SIM <= 0.97, hits_cl
    assert 0.93 <= hits_bs / N_SIM <= 0.97, hits_bs


def test_4pl_coverage_delta_method() -> None:
    rng = np.random.default_rng(77)
    a, b, c, d = 0.5, 1.5, 8.0, 20.0
    x = np.repeat([0.0, 1, 2, 4, 8, 16, 32, 64], 3)
    f = lambda xx: d + (a - d) / (1 + (xx / c) ** b)  # noqa: E731
    x0, m, sigma = 6.0, 2, 0.4
    hits = 0
    for _ in range(N_SIM):
        cal = fit_calibration(x, f(x) + rng.normal(0, sigma, x.size), model="4pl")
        pred = cal.inverse_predict(f(x0) + rng.normal(0, sigma, m))
        assert pred.method == "delta"
        hits += _covered(pred, x0)
    assert 0.93 <= hits / N_SIM <= 0.97, hits


def test_coverage_with_the_unknowns_own_se() -> None:
    # The unknown is read with 3x the standards' noise and says so through y_se: the
    # combined interval keeps its coverage; ignoring y_se would not (checked: < 80 %).
    rng = np.random.default_rng(99)
    x = np.repeat([0.0, 2, 4, 6, 8, 10], 3)
    a, b, sigma, x0 = 1.0, 2.0, 0.3, 5.0
    se_unknown = 3 * sigma
    hits = hits_ignored = 0
    for _ in range(N_SIM):
        cal = fit_calibration(x, a + b * x + rng.normal(0, sigma, x.size), model="linear")
        y0 = a + b * x0 + rng.normal(0, se_unknown, 1)
        hits += _covered(cal.inverse_predict(y0, y_se=se_unknown), x0)
        hits_ignored += _covered(cal.inverse_predict(y0), x0)
    assert 0.93 <= hits / N_SIM <= 0.97, hits
    assert hits_ignored / N_SIM < 0.80
