"""Uncertainty validation (ecl_quant.validate): the harness's truth and statistics, and a
light run of ``ecl-quant validate`` that checks the pipeline's error bars on simulated
batches with known truth (the simulator's ground truth is the reference)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate

from ecl_quant.cli import main
from ecl_quant.simulate import SimulationSpec, simulate_recording
from ecl_quant.validate import (
    ValidationSettings,
    _promised_blank_rate,
    _wilson,
    expected_integral,
    simulate_batch,
)


@pytest.fixture(scope="module")
def one_card(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    spec = SimulationSpec(size=(64, 64), n_rows=1, n_cols=2, radius_px=5.0, spacing_px=24.0,
                          amplitudes=(0.05, 0.2), n_frames=30, fps=10.0, onset_s=0.6,
                          rise_s=0.2, decay_s=0.6, encoding="png", vfr=True, seed=4)
    return simulate_recording(tmp_path_factory.mktemp("card") / "rec", spec)


def test_expected_integral_matches_numerical_quadrature(one_card):  # type: ignore[no-untyped-def]
    # Reference: scipy.integrate.quad of the noiseless rate SpotTruth.rate (numerical,
    # independent of the closed-form antiderivative) over each exposure window, and
    # numpy.trapezoid on the recorded (variable) frame times; the baseline share is
    # the mean of the first n_B frames times the span (as integrate_curve defines it).
    spot = one_card.spots[1]
    t = np.asarray(one_card.frame_times_s)
    e = np.asarray(one_card.frame_exposure_s)
    r_ap = 7.5
    frac = spot.flux_fraction_within(r_ap)
    rate_mean = np.array([
        integrate.quad(lambda u: float(spot.rate(u)), ti - ei / 2, ti + ei / 2,
                       points=[spot.onset_s] if ti - ei / 2 < spot.onset_s < ti + ei / 2
                       else None)[0] / ei
        for ti, ei in zip(t, e)])
    n_b = 5
    ref = frac * (np.trapezoid(rate_mean, t) - (t[-1] - t[0]) * rate_mean[:n_b].mean())
    got, window = expected_integral(spot, t, e, aperture_radius_px=r_ap, baseline_frames=n_b)
    assert got == pytest.approx(ref, rel=1e-7)
    ref_window = frac * integrate.quad(lambda u: float(spot.rate(u)), t[0], t[-1],
                                       points=[spot.onset_s], limit=200)[0]
    assert window == pytest.approx(ref_window, rel=1e-7)
    # Without exposure normalisation (video) each frame holds rate x exposure.
    got_v, _ = expected_integral(spot, t, e, aperture_radius_px=r_ap, baseline_frames=n_b,
                                 per_second=False)
    assert got_v == pytest.approx(ref * e[0], rel=1e-7)


def test_wilson_interval_matches_statsmodels() -> None:
    # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson").
    from statsmodels.stats.proportion import proportion_confint

    for k, n in ((0, 20), (19, 20), (380, 400), (7, 210)):
        lo, hi = proportion_confint(k, n, alpha=0.05, method="wilson")
        assert _wilson(k, n) == pytest.approx((lo, hi), abs=1e-12)


def test_promised_blank_rate_matches_monte_carlo() -> None:
    # The IUPAC LOD (blank mean + 3 s from n blanks) is reached by a blank sample mean of
    # m readings with probability P(T_{n-1} >= 3 / sqrt(1/m + 1/n)). Checked against a
    # direct numpy simulation of the rule (normal readings), within 4 binomial SDs.
    rng = np.random.default_rng(11)
    for n_b, m in ((4, 1), (4, 3), (8, 2)):
        draws = 200_000
        blanks = rng.standard_normal((draws, n_b))
        test = rng.standard_normal((draws, m)).mean(axis=1)
        lod = blanks.mean(axis=1) + 3.0 * blanks.std(axis=1, ddof=1)
        p_mc = float(np.mean(test >= lod))
        p = _promised_blank_rate("blank", n_b, m)
        assert abs(p - p_mc) < 4 * math.sqrt(p * (1 - p) / draws)
    assert math.isnan(_promised_blank_rate("ich", 4, 1))


def test_simulated_batch_design(tmp_path: Path) -> None:
    import pandas as pd

    s = ValidationSettings(n_batches=1, n_unknowns=3, n_test_blanks=1, n_frames=12)
    sim = simulate_batch(tmp_path / "b", s, 0)
    man = pd.read_csv(sim["manifest"])
    # Every planned spot is on some card, once; cards hold 4-9 spots.
    n_planned = s.n_blanks + len(s.standards) * s.standard_replicates
    n_assigned = sum(len(str(v).split(";")) for v in man["spot"])
    assert n_assigned >= n_planned + s.n_unknowns + s.n_test_blanks
    for card in sim["cards"]:
        assert 4 <= len(card["truth"].spots) <= 9
    assert set(man["role"]) == {"blank", "standard", "unknown"}
    # Unknowns carry no concentration in the manifest; their truth is in the design.
    assert man.loc[man["role"] == "unknown", "concentration"].isna().all()
    truth = sim["samples"]
    lo, hi = min(s.standards), max(s.standards)
    assert all(lo <= v["conc"] <= hi for v in truth.values() if v["kind"] == "unknown")


def test_light_validation_run(tmp_path: Path) -> None:
    """A light ``ecl-quant validate --quick``: the error bars of integrals, concentration
    intervals and LOD claims hold on simulated truth, within bands widened by what a
    small run can resolve.

    Acceptance bands: the full-run target widened by 3 standard errors of the
    statistic itself (about 1 in 370 false alarms per check for a correct pipeline):
      mean of N z-scores       |mean| <= 0.1 + 3 / sqrt(N)
      SD of N z-scores         0.9 - 3 / sqrt(2 (N - 1)) <= SD <= 1.1 + 3 / sqrt(2 (N - 1))
                               (SE of a normal sample SD: sigma / sqrt(2 (N - 1)))
      coverage of n intervals  |cov - 0.95| <= 0.02 + 3 sqrt(0.95 x 0.05 / n)
                               (binomial SD of a proportion, sqrt(p (1 - p) / n))
      blanks above the LOD     rate <= 0.05 + 3 sqrt(0.05 x 0.95 / n_blanks)
    """
    out = tmp_path / "v"
    code = main(["validate", "--quick", "--batches", "8", "--seed", "3", "--workers", "2",
                 "--out", str(out), "--quiet"])
    doc = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    s = doc["summary"]
    assert (out / "validation.png").stat().st_size > 10_000
    assert (out / "spots.csv").is_file() and (out / "samples.csv").is_file()
    zi, cv, bl = s["integrals"], s["concentrations"], s["blanks"]
    n, n_u, n_b = zi["n"], cv["n"], bl["n"]
    assert n >= 250 and n_u >= 40 and n_b >= 15
    assert zi["n_invalid"] == 0  # no spot of this design saturates
    assert abs(zi["mean"]) <= 0.1 + 3 / math.sqrt(n)
    sd_band = 3 / math.sqrt(2 * (n - 1))
    assert 0.9 - sd_band <= zi["sd"] <= 1.1 + sd_band
    assert abs(cv["coverage"] - 0.95) <= 0.02 + 3 * math.sqrt(0.95 * 0.05 / n_u)
    assert bl["fraction_above_lod"] <= 0.05 + 3 * math.sqrt(0.05 * 0.95 / n_b)
    # The CLI's verdict agrees with these bands.
    assert code == 0 and s["assessment"]["passed"]
    # The noise model was estimated from the recordings themselves (no profile given).
    assert all(src.startswith("estimated from the recording")
               for src in s["noise_model"]["sources"])
