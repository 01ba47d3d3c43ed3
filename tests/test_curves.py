"""Figures of merit and the streaming integrator.

Outside references named beside each check: scipy.integrate.trapezoid and
scipy.signal.savgol_filter (reference library), the Gaussian FWHM = 2 sqrt(2 ln 2) sigma
(textbook), EMVA 1288 Release 4.0 eq. (15) (variance = read + signal / gain), numpy
Monte Carlo for standard errors, the simulator's closed-form pulse (ecl_quant.simulate).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import trapezoid
from scipy.signal import savgol_filter

from ecl_quant.curves import (
    CurveSettings,
    NoiseModel,
    SpotIntegrator,
    crossing_width,
    curve_metrics,
    estimate_noise_model,
    integrate_curve,
    locate_peak,
    onset_time,
    smooth_curve,
    trapezoid_weights,
)
from ecl_quant.errors import SpotError
from ecl_quant.simulate import ecl_pulse, ecl_pulse_antiderivative, ecl_pulse_peak_delay
from ecl_quant.spots import BackgroundRegion, SpotSet, make_spot


def _vfr_times(n, fps=30.0, seed=0):
    rng = np.random.default_rng(seed)
    t = np.concatenate([[0.0], np.cumsum(rng.uniform(0.6, 1.4, n - 1) / fps)])
    return t


# ------------------------------------------------------------------ integral


def test_trapezoid_weights_match_scipy():
    # Reference library: scipy.integrate.trapezoid on non-uniform times.
    t = _vfr_times(57, seed=1)
    y = np.random.default_rng(2).normal(size=57)
    assert np.dot(trapezoid_weights(t), y) == pytest.approx(trapezoid(y, t), rel=1e-12)
    assert trapezoid_weights([0.0]).tolist() == [0.0]


def test_integrate_curve_matches_scipy_and_truth():
    t = _vfr_times(300, seed=3)
    pulse = ecl_pulse(t, onset_s=2.0, rise_s=0.25, decay_s=0.9)
    y = 5.0 + 40.0 * pulse  # constant baseline of 5
    base = t < 1.8
    integral, se, b = integrate_curve(t, y, np.ones_like(y), base)
    assert b == pytest.approx(5.0)
    assert integral == pytest.approx(trapezoid(y - 5.0, t), rel=1e-12)
    # The closed-form integral of the simulator's pulse over the span, to trapezoid error.
    exact = 40.0 * (ecl_pulse_antiderivative(t[-1], onset_s=2.0, rise_s=0.25, decay_s=0.9)
                    - ecl_pulse_antiderivative(t[0], onset_s=2.0, rise_s=0.25, decay_s=0.9))
    assert integral == pytest.approx(float(exact), rel=2e-3)


def test_integral_se_includes_the_shared_baseline():
    # Monte Carlo (numpy): the SD of the baseline-corrected integral over many noisy
    # curves equals the reported SE, which is larger than the naive sqrt(sum c^2 se^2)
    # because every frame shares the baseline estimate.
    rng = np.random.default_rng(4)
    t = _vfr_times(200, seed=5)
    truth = 30.0 * ecl_pulse(t, onset_s=1.5, rise_s=0.2, decay_s=1.0)
    se = 0.5 + 0.02 * truth
    base = t < 1.4
    draws = np.array([integrate_curve(t, truth + rng.normal(0, se), se, base)[0]
                      for _ in range(4000)])
    _, reported, _ = integrate_curve(t, truth, se, base)
    assert draws.std(ddof=1) == pytest.approx(reported, rel=0.05)
    naive = math.sqrt(np.sum(trapezoid_weights(t) ** 2 * se**2))
    assert reported > 1.5 * naive


# ------------------------------------------------------------------ smoothing, peak


@pytest.mark.parametrize("n, window, order", [(80, 9, 2), (80, 15, 3), (40, 21, 4), (9, 9, 2)])
def test_smooth_curve_matches_scipy_savgol(n, window, order):
    y = np.random.default_rng(n).normal(size=n)
    np.testing.assert_allclose(smooth_curve(y, window=window, order=order),
                               savgol_filter(y, window, order, mode="interp"), atol=1e-10)


def test_smooth_curve_short_input_unchanged():
    np.testing.assert_array_equal(smooth_curve([1.0, 2.0, 3.0], window=9, order=2), [1, 2, 3])


@pytest.mark.parametrize("rise, decay", [(0.25, 0.9), (0.5, 1.0), (0.05, 0.5)])
def test_peak_time_on_noiseless_pulse(rise, decay):
    # Truth: the pulse's analytic maximum (ecl_pulse_peak_delay) on VFR timestamps.
    t = _vfr_times(240, seed=6)
    y = 100.0 * ecl_pulse(t, onset_s=1.0, rise_s=rise, decay_s=decay)
    sm = smooth_curve(y, window=5, order=2)
    tp, vp, tse, vse = locate_peak(t, y, np.full_like(y, 0.01), smoothed=sm)
    assert tp == pytest.approx(1.0 + ecl_pulse_peak_delay(rise, decay), abs=0.2 / 30)
    assert vp == pytest.approx(100.0, rel=5e-3)


def test_peak_time_error_is_within_a_frame_and_its_se_honest():
    rng = np.random.default_rng(7)
    truth = 1.0 + ecl_pulse_peak_delay(0.25, 0.9)
    err, z = [], []
    for k in range(150):
        t = _vfr_times(200, seed=100 + k)
        y = 100.0 * ecl_pulse(t, onset_s=1.0, rise_s=0.25, decay_s=0.9) + rng.normal(0, 1, t.size)
        m = curve_metrics(t, y, np.ones_like(y))
        err.append(m.time_to_peak_s - truth)
        z.append((m.time_to_peak_s - truth) / m.time_to_peak_se_s)
    err, z = np.array(err), np.array(z)
    assert np.abs(err).max() < 1.0 / 30  # one nominal frame interval
    assert 0.7 < z.std() < 1.3


def test_onset_time_interpolates_the_crossing():
    t = np.arange(20) * 0.1
    y = np.where(t < 1.0, 0.0, (t - 1.0) * 10.0)  # ramp from 1.0 s, slope 10 per s
    assert onset_time(t, y, 2.5, min_frames=3) == pytest.approx(1.25)
    spike = np.zeros(20)
    spike[5] = 10.0
    assert math.isnan(onset_time(t, spike, 1.0, min_frames=3))
    assert onset_time(t, np.full(20, 5.0), 1.0) == 0.0


def test_crossing_width_gives_the_gaussian_fwhm():
    # Textbook: FWHM of a Gaussian = 2 sqrt(2 ln 2) sigma.
    t = np.linspace(0, 10, 2001)
    sigma = 0.7
    y = np.exp(-((t - 5.0) ** 2) / (2 * sigma**2))
    left, right = crossing_width(t, y, 0.5, int(np.argmax(y)))
    assert right - left == pytest.approx(2 * math.sqrt(2 * math.log(2)) * sigma, rel=1e-5)
    left, right = crossing_width(t, y, 0.5, 0)
    assert math.isnan(left)


# ------------------------------------------------------------------ curve metrics


def _pulse_curve(seed=0, amp=50.0, noise=0.5, n=240):
    rng = np.random.default_rng(seed)
    t = _vfr_times(n, seed=seed)
    y = 2.0 + amp * ecl_pulse(t, onset_s=2.0, rise_s=0.25, decay_s=0.9) + rng.normal(0, noise, n)
    return t, y, np.full(n, noise)


def test_curve_metrics_of_a_clean_pulse():
    t, y, se = _pulse_curve()
    m = curve_metrics(t, y, se, settings=CurveSettings(baseline_end_s=1.9))
    assert m.baseline == pytest.approx(2.0, abs=0.2)
    assert m.peak == pytest.approx(50.0, rel=0.03)
    assert m.onset_s == pytest.approx(2.0, abs=0.1)
    assert m.fwhm_s > 0 and m.time_above_s > m.fwhm_s
    assert m.flags == ()
    assert m.snr == pytest.approx(m.integral / m.integral_se)
    assert 0.6 < m.noise_ratio < 1.5
    # Automatic baseline: the first 5 %, refined to the frames before the onset.
    auto = curve_metrics(t, y, se)
    assert auto.baseline_frames > 30 and auto.integral == pytest.approx(m.integral, rel=0.02)


def test_a_recording_cut_before_the_pulse_ends_is_flagged():
    # Cut at 1.5 decay times after the peak the signal is ~27 % of the peak; the integral
    # then misses a known part of the pulse (analytic antiderivative of the simulated
    # first-order rise/decay shape). The full recording (to ~7 decay times) is not
    # flagged.
    from ecl_quant.simulate import ecl_pulse_antiderivative

    t, y, se = _pulse_curve()
    t_peak = 2.0 + ecl_pulse_peak_delay(0.25, 0.9)
    cut = t <= t_peak + 1.5 * 0.9
    m = curve_metrics(t[cut], y[cut], se[cut], settings=CurveSettings(baseline_end_s=1.9))
    assert "pulse_not_ended" in m.flags
    full = curve_metrics(t, y, se, settings=CurveSettings(baseline_end_s=1.9))
    assert "pulse_not_ended" not in full.flags
    shape = dict(onset_s=2.0, rise_s=0.25, decay_s=0.9)
    missing = 1 - (ecl_pulse_antiderivative(t[cut][-1], **shape)
                   / ecl_pulse_antiderivative(t[-1], **shape))
    assert missing > 0.15  # what the flag warns about
    assert m.integral == pytest.approx(full.integral * (1 - missing), rel=0.05)


def test_saturated_frames_make_the_integral_invalid():
    t, y, se = _pulse_curve(seed=1)
    sat = np.zeros(t.size, int)
    sat[80:84] = 3
    m = curve_metrics(t, y, se, saturated_px=sat)
    assert "saturated" in m.flags and m.saturated_frames == 4
    assert math.isnan(m.integral) and math.isnan(m.integral_se) and math.isnan(m.peak)
    assert math.isfinite(m.integral_raw) and math.isfinite(m.peak_raw)


def test_blank_curve_is_valid_but_flagged_no_pulse():
    rng = np.random.default_rng(2)
    t = _vfr_times(150, seed=2)
    y = rng.normal(0, 1, t.size)
    m = curve_metrics(t, y, np.ones_like(y))
    assert "no_pulse" in m.flags and "low_snr" in m.flags
    assert math.isfinite(m.integral) and abs(m.integral) < 4 * m.integral_se
    assert math.isnan(m.onset_s) and math.isnan(m.time_above_s)


def test_curve_metrics_empty_and_mismatched():
    m = curve_metrics([], [], [])
    assert m.flags == ("no_pulse",) and math.isnan(m.integral)
    with pytest.raises(SpotError):
        curve_metrics([0, 1], [1, 2, 3], [1, 1])


# ------------------------------------------------------------------ noise model


def test_noise_model_recovers_read_noise_and_gain():
    # EMVA 1288 eq. (15): variance = read variance + signal / gain; observations are
    # sample variances of n pixels (chi-square scatter) at many levels, a few outliers.
    rng = np.random.default_rng(8)
    read_var, gain = 4e-6, 2500.0
    level = rng.uniform(0.01, 0.6, 400)
    n = np.full(400, 300.0)
    true = read_var + level / gain
    obs = true * rng.chisquare(n - 1) / (n - 1)
    obs[:5] *= 20.0
    model = estimate_noise_model(level, obs, n)
    assert model.gain == pytest.approx(gain, rel=0.03)
    assert model.read_var == pytest.approx(read_var, abs=2e-6)
    assert model.source.startswith("estimated")


def test_noise_model_without_level_range_keeps_the_mean():
    level = np.full(50, 0.05)
    var = np.full(50, 2e-5)
    model = estimate_noise_model(level, var, np.full(50, 100.0))
    assert math.isinf(model.gain) and model.read_var == pytest.approx(2e-5)
    assert model.slope == 0.0
    assert estimate_noise_model([], [], []).n_points == 0


# ------------------------------------------------------------------ integrator


def _disc_frame(shape, centre, radius, flux, background, rng=None, noise=0.0):
    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w]
    disc = (np.hypot(xx - centre[0], yy - centre[1]) <= radius).astype(np.float64)
    img = background + flux * disc / disc.sum()
    if rng is not None:
        img = img + rng.normal(0, noise, shape)
    return img.astype(np.float32)


@pytest.mark.parametrize("estimator", ["mean", "median"])
def test_integrator_recovers_a_known_disc_on_a_flat_background(estimator):
    # A disc of known flux (sum of pixel values) on a known flat level: the net signal is
    # the flux exactly when the aperture covers the disc (common practice of aperture
    # photometry: background = level per pixel x area).
    shape = (60, 80)
    ss = SpotSet((make_spot(1, "circle", (30.0, 28.0, 9.0)), make_spot(2, "circle", (55.0, 30.0, 7.0))))
    integ = SpotIntegrator(ss, shape, pad_px=4, estimator=estimator)
    fluxes = [0.0, 10.0, 25.0]
    for i, f in enumerate(fluxes):
        frame = _disc_frame(shape, (30.0, 28.0), 5.0, f, 0.02)
        crop = frame[integ.region].copy()
        before = crop.copy()
        integ.add(crop, time_s=0.1 * i, shift_px=(0.0, 0.0))
        np.testing.assert_array_equal(crop, before)
    sig = integ.signals(NoiseModel(1e-6, 4000.0, "given"))
    np.testing.assert_allclose(sig["signal"][:, 0], fluxes, atol=1e-4)
    np.testing.assert_allclose(sig["signal"][:, 1], 0.0, atol=1e-4)
    np.testing.assert_allclose(sig["background"], 0.02, atol=1e-6)


def test_integrator_follows_a_whole_pixel_shift():
    shape = (60, 80)
    ss = SpotSet((make_spot(1, "circle", (40.0, 30.0, 8.0)),))
    integ = SpotIntegrator(ss, shape, pad_px=6)
    for dx, dy in [(0, 0), (4, -3), (-5, 2)]:
        frame = _disc_frame(shape, (40.0 + dx, 30.0 + dy), 5.0, 12.0, 0.01)
        integ.add(frame[integ.region], time_s=0.0, shift_px=(dx + 0.2, dy - 0.3))
    sig = integ.signals(NoiseModel(0.0, math.inf, "given"))
    np.testing.assert_allclose(sig["signal"][:, 0], 12.0, atol=1e-4)
    assert integ.clip_shift(50.0, 0.0)[2] is True


def test_integrator_se_matches_monte_carlo():
    # Per-frame SE from the variance model (read + shot, EMVA 1288 eq. 15) and the
    # background error, against the scatter of the net signal over noisy frames (numpy).
    rng = np.random.default_rng(9)
    shape = (50, 60)
    read_var, gain = 1e-4, 200.0
    ss = SpotSet((make_spot(1, "circle", (30.0, 25.0, 6.0)),))
    integ = SpotIntegrator(ss, shape, pad_px=2)
    clean = _disc_frame(shape, (30.0, 25.0), 5.0, 20.0, 0.05)
    for i in range(600):
        frame = clean + rng.normal(0, 1, shape) * np.sqrt(read_var + clean / gain)
        integ.add(frame.astype(np.float32)[integ.region], time_s=i / 30)
    sig = integ.signals(NoiseModel(read_var, gain, "given"))
    assert sig["signal"][:, 0].std(ddof=1) == pytest.approx(np.median(sig["signal_se"][:, 0]),
                                                            rel=0.1)
    # The recording's own second differences recover the model (EMVA 1288 eq. 15).
    est = estimate_noise_model(*integ.noise_observations())
    assert est.read_var + 0.05 / est.gain == pytest.approx(read_var + 0.05 / gain, rel=0.05)


def test_integrator_counts_saturated_pixels_and_uses_regions():
    shape = (40, 60)
    ss = SpotSet((make_spot(1, "circle", (20.0, 20.0, 5.0)), make_spot(2, "rect", (38, 14, 48, 26))),
                 backgrounds=(BackgroundRegion("rect", (-0.5, -0.5, 59.5, 5.5)),))
    integ = SpotIntegrator(ss, shape, pad_px=0)
    frame = np.full(shape, 0.1, np.float32)
    sat = np.zeros(shape, bool)
    sat[20, 20] = sat[19, 20] = True
    sat[20, 43] = True
    region = integ.region
    integ.add(frame[region], time_s=0.0, saturated_crop=sat[region])
    s = integ.signals(NoiseModel(0.0, math.inf, "given"))
    assert s["saturated_px"][0].tolist() == [2, 1]
    np.testing.assert_allclose(s["signal"][0], 0.0, atol=1e-5)
    assert integ.geometry.bg_n.tolist() == [360, 360]


def test_integrator_rejects_bad_geometry():
    with pytest.raises(SpotError, match="outside|not inside"):
        SpotIntegrator(SpotSet((make_spot(1, "circle", (2.0, 20.0, 5.0)),)), (40, 60))
    with pytest.raises(SpotError):
        SpotIntegrator(SpotSet(()), (40, 60))
    tight = SpotSet((make_spot(1, "circle", (10.0, 10.0, 9.0)),))
    with pytest.raises(SpotError, match="background annulus of spot 1"):
        SpotIntegrator(tight, (20, 20), annulus_inner=1.05, annulus_outer=1.06,
                       annulus_min_px=200)


# ------------------------------------------------------------------ background clipping


def _numpy_sigma_clip(x, k=3.0):
    """Plain numpy reference of the background rule (iterated median +- k x 1.4826 MAD,
    at most 4 passes, keeping every value within the band; common practice)."""
    x = np.asarray(x, np.float64)
    keep = np.ones(x.size, bool)
    med = 0.0
    for _ in range(4):
        med = np.median(x[keep])
        sd = 1.482602218505602 * np.median(np.abs(x[keep] - med))
        new = np.abs(x - med) <= k * sd + 1e-30
        if np.array_equal(new, keep) or new.sum() < 3:
            break
        keep = new
    return med, x[keep].mean(), x[keep].std(ddof=1), int(keep.sum())


def _assert_numpy_clip(rows, med, mean, sd, cnt):
    """Clipped statistics of each row equal the plain numpy reference's."""
    for k, v in enumerate(rows):
        m2, mu2, s2, c2 = _numpy_sigma_clip(v)
        assert med[k] == pytest.approx(m2, rel=1e-12, abs=1e-15)
        assert mean[k] == pytest.approx(mu2, rel=1e-9, abs=1e-15)
        assert sd[k] == pytest.approx(s2, rel=1e-9, abs=1e-15)
        assert cnt[k] == c2


def test_clipped_rows_match_a_plain_numpy_sigma_clip(code_path):
    # Rows of 8-bit-like values (many ties) and heavy-tailed floats, against numpy's
    # median/mean/std applied literally (the float rows of a dark-subtracted frame, by
    # the compiled clip_rows kernel and by the numpy code).
    from ecl_quant.curves import _clipped_rows_sorted

    rng = np.random.default_rng(41)
    for trial in range(60):
        rows = []
        for _ in range(int(rng.integers(1, 6))):
            n = int(rng.integers(3, 300))
            if trial % 2:
                rows.append((np.round(rng.normal(50, 3, n)) / 255).astype(np.float32))
            else:
                rows.append(rng.standard_cauchy(n).astype(np.float32))
        _assert_numpy_clip(rows, *_clipped_rows_sorted(rows, 3.0))


def _coded_frame(rng, shape, *, bits=8, pair=False):
    """Codes of a glowing-spot scene, their table (sRGB EOTF, IEC 61966-2-1) and ranks."""
    def srgb_to_linear(v):  # IEC 61966-2-1 EOTF
        return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)

    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w]
    glow = np.exp(-((xx - 30.0) ** 2 + (yy - 26.0) ** 2) / 60.0)
    top = 255 if bits == 8 else 65535
    base = 0.25 * top + 0.5 * top * glow
    if pair:
        y = np.clip(np.round(0.25 * top + 8 * glow + rng.normal(0, 1, shape)), 0,
                    255).astype(np.uint16)
        c = np.clip(np.round(128 + 3 * glow + rng.normal(0, 1, shape)), 0, 255).astype(np.uint16)
        codes = (y << 8) | c
        grid = np.arange(65536)
        # A (Y', C) pair -> a value not monotone in the code (as video red is).
        table = srgb_to_linear(np.clip(((grid >> 8) + 1.4 * ((grid & 255) - 128)) / 255, 0, 1))
    else:
        dtype = np.uint8 if bits == 8 else np.uint16
        codes = np.clip(np.round(base + rng.normal(0, 3 if bits == 8 else 700, shape)), 0,
                        top).astype(dtype)
        table = srgb_to_linear(np.arange(top + 1) / top)
    table = np.asarray(table, np.float32)
    uniq = np.unique(table.astype(np.float64))
    rank = np.searchsorted(uniq, table.astype(np.float64)).astype(np.uint16)

    class Coded:
        pass

    coded = Coded()
    coded.codes, coded.table, coded.rank, coded.rank_value = codes, table, rank, uniq
    coded.paired = pair
    return coded


@pytest.fixture(params=["compiled", "numpy"])
def code_path(request, monkeypatch):
    """Run a test with the compiled kernel (ecl_quant._jit) and with the numpy path."""
    from ecl_quant import _jit

    monkeypatch.setenv("ECL_QUANT_JIT", "1" if request.param == "compiled" else "0")
    if request.param == "compiled":
        assert _jit.kernels() is not None, "the compiled kernels are built at install (make install)"
    return request.param


@pytest.mark.parametrize("bits,pair", [(8, False), (8, True), (16, False)])
def test_integrator_from_codes_equals_the_float_path(bits, pair, code_path, monkeypatch):
    # The code histogram / radix path (compiled or numpy) must give the same background
    # statistics as the float values (numpy sort) and the plain numpy sigma clip, with a
    # drift shift and a few replaced (hot) pixels inside the annuli.
    used = []
    original = SpotIntegrator._add_compiled

    def spy(self, *args, **kwargs):
        out = original(self, *args, **kwargs)
        used.append(out is not None)
        return out

    monkeypatch.setattr(SpotIntegrator, "_add_compiled", spy)
    rng = np.random.default_rng(42 + bits + pair)
    shape = (56, 90)
    ss = SpotSet((make_spot(1, "circle", (30.0, 26.0, 6.0)), make_spot(2, "circle", (62.0, 28.0, 5.0))))
    a = SpotIntegrator(ss, shape, pad_px=3)
    b = SpotIntegrator(ss, shape, pad_px=3)
    c = SpotIntegrator(ss, shape, pad_px=3)  # values read from the codes only
    region = a.region
    # Replaced pixels: some in each annulus (unshifted positions) and one in an aperture.
    g = a.geometry
    hot = np.sort(np.concatenate([g.bg_flat[[3, 40, 90]], g.bg_flat[g.bg_spot == 1][[5, 60]],
                                  g.ap_idx[[10]]])).astype(np.intp)
    for i, shift in enumerate([(0, 0), (0, 0), (0, 0), (2, -1), (2, -1), (2, -1), (-3, 2)]):
        coded = _coded_frame(rng, shape, bits=bits, pair=pair)
        coded.codes = np.ascontiguousarray(coded.codes[region])
        lin = np.take(coded.table, coded.codes)
        # Replaced values near their neighbours' (kept by the clipping), off the table.
        lin.reshape(-1)[hot] = lin.reshape(-1)[hot - 1] * np.float32(1.0007)
        a.add(lin, time_s=float(i), shift_px=shift, coded=coded, replaced=hot)
        b.add(lin.copy(), time_s=float(i), shift_px=shift)
        c.add(None, time_s=float(i), shift_px=shift, coded=coded, replaced=hot,
              replaced_values=lin.reshape(-1)[hot])
        # numpy reference on the same annulus pixels (shifted like the masks).
        g = a.geometry
        off = shift[1] * g.shape[1] + shift[0]
        flat = lin.reshape(-1)
        for k in range(2):
            vals = flat[g.bg_flat[g.bg_spot == k] + off]
            ref = _numpy_sigma_clip(vals)
            assert a.raw_arrays()["bg"][-1, k] == pytest.approx(ref[1], rel=1e-9)
            assert a.raw_arrays()["bg_sd"][-1, k] == pytest.approx(ref[2], rel=1e-9)
            assert a.raw_arrays()["bg_n"][-1, k] == ref[3]
    ra, rb, rc = a.raw_arrays(), b.raw_arrays(), c.raw_arrays()
    for key in ("sum", "sum_w2", "bg", "bg_sd", "bg_n"):
        np.testing.assert_allclose(ra[key], rb[key], rtol=1e-12, atol=0)
        np.testing.assert_allclose(rc[key], rb[key], rtol=1e-12, atol=0)
    assert c.noise_observations()[0].size == 2 * 2 * 2  # frames 3 and 6, 2 x 2 groups
    for x, y in zip(c.noise_observations(), b.noise_observations()):
        np.testing.assert_allclose(x, y, rtol=1e-12)
    if code_path == "numpy":
        assert not used
    elif bits == 8:
        assert used and all(used)  # every coded frame went through the kernel
    else:  # 16-bit codes span too wide a range for a histogram: the numpy radix path
        assert used and not any(used)


def test_integrator_reads_video_codes_from_the_planes(code_path):
    # A video frame's codes gathered straight from its Y' and Cr planes (lazy coded
    # crop: the crop is never built) must give the statistics of the float path on
    # linearize(channel_values) (BT.709 formulas, CAMERA_NOTES 1.4), with drift shifts
    # and replaced (hot) pixels; the numpy sigma clip is the reference of the latter.
    from ecl_quant.frames import Frame
    from ecl_quant.radiometry import channel_values, code_values, linearize
    from ecl_quant.transfer import TransferSpec

    rng = np.random.default_rng(44)
    h, w = 57, 91
    ss = SpotSet((make_spot(1, "circle", (30.0, 26.0, 6.0)), make_spot(2, "circle", (62.0, 28.0, 5.0))))
    a = SpotIntegrator(ss, (h, w), pad_px=3)
    b = SpotIntegrator(ss, (h, w), pad_px=3)
    g = a.geometry
    hot = np.sort(np.concatenate([g.bg_flat[[3, 40]], g.ap_idx[[10]]])).astype(np.intp)
    yy, xx = np.mgrid[0:h, 0:w]
    glow = np.exp(-((xx - 30.0) ** 2 + (yy - 26.0) ** 2) / 60.0)
    for i, shift in enumerate([(0, 0), (0, 0), (0, 0), (1, -2), (1, -2), (1, -2)]):
        # Dim background, glowing spot: the annuli span a few codes of Y' and Cr (the
        # code histogram applies; see test above for the wide-range fallback).
        y = np.clip(np.round(60 + 40 * glow + rng.normal(0, 1, (h, w))), 0, 255).astype(np.uint8)
        cb = rng.integers(126, 131, (29, 46), np.uint8)
        cr = np.clip(np.round(128 + 10 * glow[::2, ::2] + rng.normal(0, 0.7, (29, 46))), 0,
                     255).astype(np.uint8)
        fr = Frame(index=i, time_s=float(i), data=y, max_code=255, source="m", kind="video",
                   chroma=(cb, cr), chroma_step=(2, 2), yuv_matrix="bt709",
                   yuv_range="limited")
        lin = linearize(channel_values(fr, "red", region=a.region), TransferSpec("bt709"),
                        channel="red")
        lin.reshape(-1)[hot] = lin.reshape(-1)[hot - 1] * np.float32(1.0007)
        coded = code_values(fr, "red", "bt709", region=a.region, lazy=True)
        a.add(None, time_s=float(i), shift_px=shift, coded=coded, replaced=hot,
              replaced_values=lin.reshape(-1)[hot])
        assert coded._codes is None or code_path == "numpy"  # the kernel built no crop
        b.add(lin, time_s=float(i), shift_px=shift)
        off = shift[1] * g.shape[1] + shift[0]
        for k in range(2):
            ref = _numpy_sigma_clip(lin.reshape(-1)[g.bg_flat[g.bg_spot == k] + off])
            assert a.raw_arrays()["bg"][-1, k] == pytest.approx(ref[1], rel=1e-9)
            assert a.raw_arrays()["bg_n"][-1, k] == ref[3]
    ra, rb = a.raw_arrays(), b.raw_arrays()
    for key in ("sum", "sum_w2", "bg", "bg_sd", "bg_n"):
        np.testing.assert_allclose(ra[key], rb[key], rtol=1e-12, atol=0)
    assert a.noise_observations()[0].size == 2 * 2 * 2
    for x, y_ in zip(a.noise_observations(), b.noise_observations()):
        np.testing.assert_allclose(x, y_, rtol=1e-12)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_integrator_reads_still_codes_in_place(dtype, code_path):
    # One channel of an RGB still, gathered in place (lazy coded crop of a strided
    # plane), against the float path on linearize(channel_values) (sRGB EOTF,
    # IEC 61966-2-1) with a shift; 16-bit codes take the numpy radix path.
    from ecl_quant.frames import Frame
    from ecl_quant.radiometry import channel_values, code_values, linearize
    from ecl_quant.transfer import TransferSpec

    rng = np.random.default_rng(45)
    h, w = 57, 91
    top = np.iinfo(dtype).max
    ss = SpotSet((make_spot(1, "circle", (30.0, 26.0, 6.0)), make_spot(2, "circle", (62.0, 28.0, 5.0))))
    a = SpotIntegrator(ss, (h, w), pad_px=3)
    b = SpotIntegrator(ss, (h, w), pad_px=3)
    for i, shift in enumerate([(0, 0), (0, 0), (0, 0), (-2, 1)]):
        rgb = np.clip(np.round(rng.normal(0.3 * top, 0.01 * top, (h, w, 3))), 0, top).astype(dtype)
        fr = Frame(index=i, time_s=float(i), data=rgb, max_code=float(top), source="s",
                   kind="still", bit_depth=8 * np.dtype(dtype).itemsize)
        coded = code_values(fr, "green", "srgb", region=a.region, lazy=True)
        a.add(None, time_s=float(i), shift_px=shift, coded=coded)
        b.add(linearize(channel_values(fr, "green", region=a.region), TransferSpec("srgb"),
                        channel="green"), time_s=float(i), shift_px=shift)
    ra, rb = a.raw_arrays(), b.raw_arrays()
    for key in ("sum", "sum_w2", "bg", "bg_sd", "bg_n"):
        np.testing.assert_allclose(ra[key], rb[key], rtol=1e-12, atol=0)
    for x, y_ in zip(a.noise_observations(), b.noise_observations()):
        np.testing.assert_allclose(x, y_, rtol=1e-12)


def test_compiled_clipping_matches_a_plain_numpy_sigma_clip():
    # The kernel clips rows given as distinct values with counts (a band around the
    # median, merged distances); against numpy's median/mean/std applied literally to
    # the expanded values (same reference as above).
    from ecl_quant import _jit

    if not _jit.enabled():
        pytest.skip("compiled kernels disabled (ECL_QUANT_JIT=0 in the environment)")
    kernels = _jit.kernels()
    assert kernels is not None, "build the C kernels: pip install -e ."
    rng = np.random.default_rng(43)
    for trial in range(80):
        rows = []
        for _ in range(int(rng.integers(1, 6))):
            n = int(rng.integers(3, 300))
            if trial % 2:  # 8-bit-like: many ties
                rows.append(np.round(rng.normal(50, 3, n)) / 255)
            else:
                rows.append(np.round(rng.standard_cauchy(n), 1))
        distinct = [np.unique(v, return_counts=True) for v in rows]
        width = np.array([d[0].size for d in distinct], np.int64)
        cv = np.full((len(rows), width.max()), np.inf)
        cc = np.zeros((len(rows), width.max()), np.int64)
        for k, (v, c) in enumerate(distinct):
            cv[k, :v.size], cc[k, :v.size] = v, c
        _assert_numpy_clip(rows, *kernels.clip_rows(cv, cc, width, 3.0))


def test_weighted_order_statistics_match_a_sort_of_the_expanded_multiset():
    # The MAD's order statistics: the value at positions lo and hi of the multiset in
    # which each entry occurs `weight` times, read here off numpy's sort of the expanded
    # multiset (np.repeat + np.sort, reference library), for rows with ties, repeats,
    # and weights of 0 (entries left out, +inf).
    from ecl_quant.curves import _weighted_order_stats

    rng = np.random.default_rng(7)
    for trial in range(200):
        n_rows, width = int(rng.integers(1, 9)), int(rng.integers(1, 60))
        dev = np.round(rng.exponential(1.0, (n_rows, width)), 1 if trial % 2 else 6)
        top = 1 if trial % 3 == 0 else 4
        w = rng.integers(0, top + 1, (n_rows, width))
        w[:, 0] = np.maximum(w[:, 0], 1)  # every row keeps something
        dev = np.where(w > 0, dev, np.inf)
        total = w.sum(axis=1)
        lo = np.maximum((total - 1) // 2, 0)
        hi = total // 2
        hi = np.minimum(hi, total - 1)
        got_lo, got_hi = _weighted_order_stats(dev, w, lo, hi)
        for r in range(n_rows):
            expanded = np.sort(np.repeat(dev[r], w[r]))
            assert got_lo[r] == expanded[lo[r]] and got_hi[r] == expanded[hi[r]]
