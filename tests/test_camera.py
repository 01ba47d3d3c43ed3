"""Camera characterisation against EMVA 1288, numpy and OpenCV.

Sources named beside each check:
- EMVA Standard 1288 Release 4.0 Linear (Release Candidate, 2021-03-15): equations as
  numbered there; check values from shared/CAMERA_NOTES.md section 2.7, computed straight
  from those equations.
- numpy as the reference library for the variance of a difference, covariance and the
  weighted line fit (np.polynomial.polynomial.polyfit with w = 1/y is the LE fit).
- OpenCV (cv2.createCalibrateDebevec) called directly for the response recovery.
- IEC 61966-2-1:1999 sRGB decoding (written out in this file) as the true response.
Simulated sensors (ecl_quant._camsim) carry their own ground truth.
"""

from __future__ import annotations

import json
import math
from fractions import Fraction
from pathlib import Path

import cv2
import numpy as np
import pytest
from PIL import ExifTags, Image, TiffImagePlugin

from ecl_quant import camera
from ecl_quant._camsim import bracket_scene, simulate_bracket, simulate_flat_pairs
from ecl_quant.camera import (
    LevelMeasurement,
    PairStatistics,
    analyse_photon_transfer,
    linearity_error,
    pair_statistics,
    photon_transfer,
    recover_response,
)
from ecl_quant.cli import main
from ecl_quant.errors import InputFormatError, ShapeMismatchError
from ecl_quant.transfer import srgb_encode


def _srgb_decode(v: np.ndarray) -> np.ndarray:
    # IEC 61966-2-1 decoding, written out independently of ecl_quant.transfer.
    v = np.asarray(v, dtype=np.float64)
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


# ---------------------------------------------------------------- EMVA 1288 check values
# CAMERA_NOTES 2.7: K = 0.5 DN/e-, sigma_d = 3 e-, eta = 0.6, sigma_q^2 = 1/12.
K_REF, SD_REF, ETA_REF = 0.5, 3.0, 0.6
TABLE_27 = [  # mu_p, mu_y - mu_y.dark (DN), sigma_y^2 (DN^2), SNR
    (0, 0, 2.33333, 0.0),
    (10, 3, 3.83333, 1.532262),
    (100, 30, 17.33333, 7.205767),
    (1000, 300, 152.33333, 24.306576),
    (10000, 3000, 1502.33333, 77.399491),
]


def test_variance_and_snr_models_reproduce_emva_table():
    # EMVA 1288 Eq. 6 (mean), Eq. 15 (photon transfer), Eq. 20/21 (SNR); CAMERA_NOTES 2.7.
    for mu_p, above, var, snr in TABLE_27:
        assert K_REF * ETA_REF * mu_p == pytest.approx(above)
        v = camera.variance_model(above, gain_dn_per_e=K_REF, dark_noise_e=SD_REF)
        assert float(v) == pytest.approx(var, abs=1e-5)
        s = camera.snr_model(mu_p, eta=ETA_REF, gain_dn_per_e=K_REF, dark_noise_e=SD_REF)
        assert float(s) == pytest.approx(snr, abs=1e-6)
        if mu_p:  # Eq. 20 on the model mean and variance gives the same SNR
            assert above / math.sqrt(float(v)) == pytest.approx(snr, abs=1e-6)


def test_dark_noise_and_sensitivity_threshold_check_values():
    # EMVA 1288 Eq. 53 (sigma_d), Eq. 26/27 (mu_p.min, mu_e.min), Eq. 88 (R3.1 approximation).
    dvar = K_REF**2 * SD_REF**2 + 1 / 12  # 2.333333 DN^2
    sd, upper = camera.dark_noise_electrons(dvar, K_REF)
    assert sd == pytest.approx(3.000000, abs=1e-6) and not upper
    thr = camera.sensitivity_threshold(dvar, K_REF, eta=ETA_REF)
    assert thr["photons"] == pytest.approx(5.992827, abs=1e-6)
    assert thr["photons_r31"] == pytest.approx(5.925084, abs=1e-6)
    assert thr["electrons"] == pytest.approx(3.595696, abs=1e-6)
    # Eq. 54: below 0.24 DN^2 only the upper limit 0.40/K is reported.
    sd_low, upper_low = camera.dark_noise_electrons(0.2, K_REF)
    assert upper_low and sd_low == pytest.approx(0.40 / K_REF)


def _model_level(mu_p: float, *, n_pixels: int = 10**6, sat_fraction: float = 0.0,
                 dark_dn: float = 100.0) -> LevelMeasurement:
    """A level whose statistics are exactly the EMVA linear model (no noise)."""
    above = K_REF * ETA_REF * mu_p
    var = float(camera.variance_model(above, gain_dn_per_e=K_REF, dark_noise_e=SD_REF))
    dvar = float(camera.variance_model(0.0, gain_dn_per_e=K_REF, dark_noise_e=SD_REF))
    flat = PairStatistics(dark_dn + above, dark_dn + above, dark_dn + above, var, 0.0,
                          n_pixels, sat_fraction, 4095.0)
    dark = PairStatistics(dark_dn, dark_dn, dark_dn, dvar, 0.0, n_pixels, 0.0, 4095.0)
    return LevelMeasurement(exposure_s=mu_p * 1e-6, flat=flat, dark=dark, photons=mu_p)


def test_analysis_of_exact_model_data_reproduces_check_values():
    # EMVA 1288 Eqs. 49-50, 52-55, 26, 28 on noise-free model data; CAMERA_NOTES 2.7 with
    # mu_p.sat = 40000: mu_e.sat = 24000, SNRmax = 154.9193, DR = 6674.647 (76.489 dB).
    mu_p = np.linspace(0, 40000, 41)
    levels = [_model_level(p, sat_fraction=0.0015 if p == 40000 else 0.0) for p in mu_p]
    levels.append(_model_level(44000, sat_fraction=0.4))
    res = analyse_photon_transfer(levels)
    assert res.saturation.method == "within_band"
    assert res.saturation_above_dark_dn == pytest.approx(K_REF * ETA_REF * 40000)
    assert res.gain_dn_per_e == pytest.approx(K_REF, rel=1e-12)
    assert res.dark_noise_e == pytest.approx(3.0, rel=1e-9)
    assert res.eta == pytest.approx(ETA_REF, rel=1e-12)
    assert res.responsivity_unit == "DN/photon"
    assert res.saturation_capacity_e == pytest.approx(24000)
    assert res.snr_max == pytest.approx(154.9193, abs=1e-4)
    assert res.sensitivity_threshold_photons == pytest.approx(5.992827, abs=1e-6)
    assert res.dynamic_range == pytest.approx(6674.647, abs=1e-3)
    d = res.to_dict()
    assert d["dynamic_range_db"] == pytest.approx(76.489, abs=1e-3)
    assert d["snr_max_db"] == pytest.approx(43.802, abs=1e-3)
    assert res.linearity.le_pct == pytest.approx(0.0, abs=1e-9)
    assert res.linear_model_applies
    assert res.ptc_nonlinearity_pct == pytest.approx(0.0, abs=1e-6)
    json.dumps(d)  # camera.json must be serialisable


# ---------------------------------------------------------------- linearity error
def test_linearity_error_check_values():
    # EMVA 1288 Eqs. 58-63, example of CAMERA_NOTES 2.7: LE = 0.26672 %.
    h = 1000.0 * np.arange(1, 11)
    y = 0.3 * h * (1 - 2e-6 * h) + 5
    np.testing.assert_allclose(y, [304.4, 602.6, 899.6, 1195.4, 1490.0, 1783.4, 2075.6,
                                   2366.6, 2656.4, 2945.0])
    le = linearity_error(h, y, saturation_dn=2945.0)
    assert le.n_points == 9
    assert le.offset_dn == pytest.approx(9.791438, abs=1e-6)
    assert le.slope_dn_per_h == pytest.approx(0.295488783, abs=1e-9)
    np.testing.assert_allclose(
        le.deviation_pct[:9],
        [-0.28833, 0.30478, 0.37291, 0.30656, 0.18589, 0.03791, -0.12573, -0.29918, -0.47919],
        atol=5e-6)
    assert np.isnan(le.deviation_pct[9])
    assert le.le_pct == pytest.approx(0.26672, abs=5e-6)
    assert le.le_min_pct == pytest.approx(-0.47919, abs=5e-6)
    assert le.le_max_pct == pytest.approx(0.37291, abs=5e-6)
    # numpy reference: the Eq. 58 fit is polyfit with weights 1/y (CAMERA_NOTES 2.4).
    a0, a1 = np.polynomial.polynomial.polyfit(h[:9], y[:9], 1, w=1 / y[:9])
    assert le.offset_dn == pytest.approx(a0, rel=1e-10)
    assert le.slope_dn_per_h == pytest.approx(a1, rel=1e-10)


def test_linearity_error_needs_three_points():
    with pytest.raises(InputFormatError, match="at least 3"):
        linearity_error([1.0, 2.0, 3.0], [1.0, 2.0, 100.0], saturation_dn=100.0)


# ---------------------------------------------------------------- two-image statistics
def test_pair_statistics_against_numpy():
    # EMVA 1288 Eq. 18 equals half the (ddof=0) variance of the difference image; Eq. 32
    # equals numpy's biased covariance of the two images.
    rng = np.random.default_rng(3)
    pattern = rng.normal(0, 2.0, (200, 300))  # spatial variance 4
    a = 500 + pattern + rng.normal(0, 3.0, pattern.shape)  # temporal variance 9
    b = 500.5 + pattern + rng.normal(0, 3.0, pattern.shape)  # +0.5 DN offset drift
    a_copy, b_copy = a.copy(), b.copy()
    st = pair_statistics(a, b)
    np.testing.assert_array_equal(a, a_copy)  # inputs unchanged
    np.testing.assert_array_equal(b, b_copy)
    assert st.temporal_variance_dn2 == pytest.approx(0.5 * np.var(a - b), rel=1e-12)
    assert st.spatial_variance_dn2 == pytest.approx(
        np.cov(a.ravel(), b.ravel(), bias=True)[0, 1], rel=1e-10)
    assert st.mean_dn == pytest.approx(0.5 * (a.mean() + b.mean()), rel=1e-14)
    # The mean-difference term (new in R4) removes 1/2 (mu0 - mu1)^2 from the plain mean
    # square of the difference; the corrected value estimates 9 within Eq. 19's 4 sigma.
    plain = np.mean((a - b) ** 2) / 2
    assert plain - st.temporal_variance_dn2 == pytest.approx(0.5 * (a.mean() - b.mean()) ** 2)
    assert abs(st.temporal_variance_dn2 - 9.0) < 4 * 9.0 * math.sqrt(2 / a.size)
    assert abs(st.spatial_variance_dn2 - np.var(pattern)) < 0.1


def test_pair_statistics_on_a_frame_larger_than_one_block():
    # Frames above 2**20 pixels are summed block by block; numpy on the whole arrays is
    # the reference (Eq. 18 = half the ddof=0 variance of the difference).
    rng = np.random.default_rng(9)
    a = rng.integers(900, 1100, (1100, 1000), dtype=np.uint16)
    b = rng.integers(905, 1105, (1100, 1000), dtype=np.uint16)
    st = pair_statistics(a, b)
    af, bf = a.astype(np.float64), b.astype(np.float64)
    assert st.temporal_variance_dn2 == pytest.approx(0.5 * np.var(af - bf), rel=1e-10)
    assert st.spatial_variance_dn2 == pytest.approx(
        np.cov(af.ravel(), bf.ravel(), bias=True)[0, 1], abs=1e-6)


def test_pair_statistics_integer_input_and_saturation():
    a = np.array([[0, 4095], [10, 4095]], dtype=np.uint16)
    b = np.array([[1, 4095], [12, 4000]], dtype=np.uint16)
    st = pair_statistics(a, b, max_code=4095)
    assert st.saturated_fraction == pytest.approx(3 / 8)
    d = a.astype(float) - b.astype(float)
    assert st.temporal_variance_dn2 == pytest.approx(0.5 * np.var(d))


def test_pair_of_unequal_size_is_rejected():
    with pytest.raises(ShapeMismatchError, match="differ in size"):
        pair_statistics(np.zeros((4, 5)), np.zeros((5, 4)))


# ---------------------------------------------------------------- simulated sensors
@pytest.fixture(scope="module")
def linear_sensor():
    # Known truth: K = 0.45 DN/e-, sigma_d = 2.8 e-, 12-bit ADC clipping before full well.
    sim = simulate_flat_pairs(gain_dn_per_e=0.45, read_noise_e=2.8, full_well_e=12000,
                              shape=(256, 256), seed=11)
    res = photon_transfer([f[:2] for f in sim.flats], [d[:2] for d in sim.darks],
                          sim.exposure_s, max_code=sim.truth.max_code)
    return sim, res


def test_simulated_sensor_gain_noise_and_saturation(linear_sensor):
    sim, res = linear_sensor
    # EMVA 1288 Eq. 50 (gain) and Eq. 53 (dark noise) against the simulation's truth.
    assert res.gain_dn_per_e == pytest.approx(0.45, rel=0.03)
    assert res.dark_noise_e == pytest.approx(2.8, rel=0.03)
    # R4 saturation: the mean grey value where 0.15 % of pixels read the maximum code.
    assert res.saturation.mean_dn == pytest.approx(sim.saturation_mean_dn, rel=0.005)
    # ...and it lies between the right pair of levels.
    i = res.saturation.index
    assert sim.photons[i - 1] < sim.saturation_photons <= sim.photons[i]
    # The R3.1 variance maximum is reported beside it, at or just below saturation.
    assert res.saturation.variance_max_index in (i - 1, i)
    # Saturation capacity in electrons (Eq. 24 with eta mu_p = (mu_y - mu_y.dark)/K).
    true_cap = (sim.saturation_mean_dn - sim.truth.dark_offset_dn) / 0.45
    assert res.saturation_capacity_e == pytest.approx(true_cap, rel=0.03)


def test_simulated_linear_sensor_is_linear(linear_sensor):
    _sim, res = linear_sensor
    # EMVA 1288 section 6.9: a linear sensor gives LE below 0.3 %; Eq. 51 below 3 %.
    assert res.linearity.le_pct < 0.3
    assert res.linearity.n_points >= 20
    assert res.linear_model_applies is True
    assert any("linear model of EMVA 1288 applies" in line for line in res.verdict())


def test_saturation_within_band_uses_that_level():
    # EMVA 1288 R4: a level with 0.1-0.2 % of pixels at the maximum defines saturation.
    probe = simulate_flat_pairs(shape=(8, 8), exposure_s=[0.0], seed=0)
    t_sat = probe.saturation_photons / probe.truth.photon_flux_per_s
    t = np.concatenate([np.linspace(0, 0.9 * t_sat, 12), [t_sat, 1.1 * t_sat]])
    sim = simulate_flat_pairs(shape=(256, 256), exposure_s=t, seed=5)
    res = photon_transfer([f[:2] for f in sim.flats], [d[:2] for d in sim.darks],
                          sim.exposure_s, max_code=sim.truth.max_code)
    assert res.saturation.method == "within_band"
    assert res.saturation.index == 12
    assert res.saturation.mean_dn == pytest.approx(sim.saturation_mean_dn, rel=0.002)


def test_nonlinear_sensor_linearity_error_matches_definition():
    # A sensor whose signal is compressed by 12 % at full scale: about 2 % LE.
    sim = simulate_flat_pairs(shape=(128, 128), nonlinearity=0.12, seed=2)
    res = photon_transfer([f[:2] for f in sim.flats], [d[:2] for d in sim.darks],
                          sim.exposure_s, max_code=sim.truth.max_code)
    # LE straight from the definition (Eqs. 58-63) on the simulation's expected means,
    # with numpy's weighted polyfit (w = 1/y) for the Eq. 58 line.
    y = sim.expected_mean_dn - sim.expected_dark_dn
    y_sat = sim.saturation_mean_dn - sim.truth.dark_offset_dn
    use = (y >= 0.05 * y_sat) & (y <= 0.95 * y_sat)
    a0, a1 = np.polynomial.polynomial.polyfit(sim.exposure_s[use], y[use], 1, w=1 / y[use])
    fit = a0 + a1 * sim.exposure_s[use]
    le_true = float(np.mean(np.abs(100 * (y[use] - fit) / fit)))
    assert 1.5 < le_true < 2.5
    assert res.linearity.le_pct == pytest.approx(le_true, abs=0.3)
    assert res.linearity.le_pct > 1.0  # clearly not reported as linear


def test_nonuniformity_from_stacks():
    # EMVA 1288 Eqs. 35, 36, 65 (stack variance) and 66-67 (DSNU1288, PRNU1288).
    sim = simulate_flat_pairs(shape=(96, 96), exposure_s=[0.0, 0.007], prnu=0.01,
                              dsnu_e=6.0, frames_per_level=24, dark_frames_per_level=24,
                              seed=4)
    dark = camera.stack_statistics(iter(sim.darks[0]))
    bright = camera.stack_statistics(iter(sim.flats[1]))
    assert dark.n_frames == 24
    # Eq. 65 temporal variance = K^2 sigma_d^2 + sigma_q^2 for the dark stack.
    assert dark.temporal_variance_dn2 == pytest.approx(0.45**2 * 2.8**2 + 1 / 12, rel=0.03)
    nu = camera.nonuniformity(dark, bright, gain_dn_per_e=0.45)
    assert nu.method == "stack"
    assert nu.dsnu_e == pytest.approx(np.std(sim.dsnu_map), rel=0.05)
    assert nu.prnu_pct == pytest.approx(100 * np.std(sim.prnu_map), rel=0.05)


def test_highpass_removes_smooth_shading():
    # EMVA 1288 section 8.1: the high-pass filter keeps pixel-scale PRNU and drops
    # vignetting-like shading. Truth: the realised white PRNU map.
    rng = np.random.default_rng(8)
    shape = (120, 120)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    shading = 1.0 - 0.1 * (((xx - 60) ** 2 + (yy - 60) ** 2) / 60**2)
    prnu = rng.normal(0, 0.01, shape)
    frames = [1000 * shading * (1 + prnu) + rng.normal(0, 5, shape) for _ in range(8)]
    plain = camera.stack_statistics(iter(frames))
    filt = camera.stack_statistics(iter(frames), highpass=True)
    truth = np.var(1000 * shading * prnu)
    assert plain.spatial_variance_dn2 > 3 * truth
    assert filt.spatial_variance_dn2 == pytest.approx(truth, rel=0.1)
    assert filt.shape == (102, 102)


def test_bad_array_input():
    sim = simulate_flat_pairs(shape=(16, 16), exposure_s=[0.0, 0.002, 0.004, 0.006], seed=1)
    flats = [f[:2] for f in sim.flats]
    darks = [d[:2] for d in sim.darks]
    with pytest.raises(InputFormatError, match="two images per level"):
        photon_transfer([flats[0][:1]] + flats[1:], darks, sim.exposure_s, max_code=4095)
    with pytest.raises(InputFormatError, match="at least 3"):
        photon_transfer(flats[:2], darks[:2], sim.exposure_s[:2], max_code=4095)
    sat = [(np.full((16, 16), 4095, np.uint16),) * 2 for _ in range(4)]
    with pytest.raises(InputFormatError, match="all frames saturated"):
        photon_transfer(sat, darks, sim.exposure_s, max_code=4095)


# ---------------------------------------------------------------- response curves
EXPOSURES = 2.0 ** np.arange(-6, 1)  # 1/64 .. 1 s, one stop apart


@pytest.fixture(scope="module")
def srgb_bracket():
    scene = bracket_scene((120, 160), span_stops=9.0)
    images = simulate_bracket(scene, EXPOSURES, scale=4.0, noise_codes=0.5, seed=0)
    return scene, images


def test_debevec_matches_opencv_called_directly(srgb_bracket):
    _scene, images = srgb_bracket
    curve = recover_response(images, EXPOSURES, samples=150, smoothness=10.0)
    # OpenCV's own call; times must be float32 (CAMERA_NOTES section 3).
    direct = cv2.createCalibrateDebevec(samples=150, lambda_=10.0).process(
        images, EXPOSURES.astype(np.float32))
    np.testing.assert_array_equal(curve.opencv_response, direct[:, 0, :])
    # The normalised curve is OpenCV's divided by one full-scale factor per channel.
    ratio = curve.response[10:240] / direct[10:240, 0, :]
    np.testing.assert_allclose(ratio / ratio[100], 1.0, rtol=0.02)
    assert curve.full_scale_method == ("clip_threshold",) * 3
    doc = json.loads(json.dumps(curve.to_dict()))
    assert doc["response"]["green"] == pytest.approx(curve.response[:, 1].tolist())
    assert list(curve.to_frame().columns) == ["code", "red", "green", "blue"]


def test_debevec_recovers_srgb_decoding(srgb_bracket):
    _scene, images = srgb_bracket
    curve = recover_response(images, EXPOSURES)
    truth = _srgb_decode(np.arange(256) / 255.0)  # IEC 61966-2-1
    mid = slice(40, 221)
    for c in range(3):
        np.testing.assert_allclose(curve.response[mid, c], truth[mid], rtol=0.03)
    assert np.all(np.diff(curve.response, axis=0) >= 0)
    assert curve.response[0, 0] == 0.0 and curve.response[255, 0] == 1.0
    assert np.all(curve.response <= 1.0)


def test_profile_keeps_an_8x_ratio(srgb_bracket, tmp_path):
    _scene, images = srgb_bracket
    prof = camera.profile_from_bracket(images, EXPOSURES, make="TernCam", model="T-1")
    path = camera.save_profile(prof, tmp_path / "phone.json")
    # Two spots of true linear light 0.05 and 0.40 (ratio 8), sRGB-encoded to 8 bits.
    rng = np.random.default_rng(1)
    lin = np.zeros((40, 80, 3))
    lin[:, :40] = 0.05
    lin[:, 40:] = 0.40
    codes = np.clip(np.rint(255 * srgb_encode(lin) + rng.normal(0, 0.5, lin.shape)), 0, 255)
    codes = codes.astype(np.uint8)
    loaded = camera.load_profile(path)
    for ch, i in (("red", 0), ("green", 1), ("blue", 2)):
        v = loaded.linearize(codes[..., i], ch)
        assert v[:, 40:].mean() / v[:, :40].mean() == pytest.approx(8.0, rel=0.03)
    # The radiometry stage reads the same file for --transfer profile=FILE.
    from ecl_quant.radiometry import load_transfer_profile

    tp = load_transfer_profile(path)
    v = tp(codes[..., 1] / 255.0, "green")
    assert v[:, 40:].mean() / v[:, :40].mean() == pytest.approx(8.0, rel=0.03)
    np.testing.assert_allclose(tp(np.arange(256) / 255.0, "luma"), loaded.response["luma"],
                               rtol=1e-6, atol=1e-7)


def test_profile_document_and_schema(srgb_bracket, tmp_path):
    import jsonschema

    _scene, images = srgb_bracket
    prof = camera.profile_from_bracket(images, EXPOSURES, make="TernCam", model="T-1")
    path = camera.save_profile(prof, tmp_path / "p.json")
    doc = json.loads(path.read_text())
    schema = json.loads((Path(camera.__file__).parent / "schemas" /
                         "device_profile.schema.json").read_text())
    jsonschema.validate(doc, schema)
    assert doc["schema"] == "ecl_quant.device_profile" and doc["version"] == 1
    assert doc["device"] == {"make": "TernCam", "model": "T-1"}
    assert set(doc["measured_channels"]) == {"red", "green", "blue", "luma"}
    assert all(len(doc["response"][c]) == 256 for c in ("red", "green", "blue", "luma"))
    assert doc["response"]["luma"][255] == pytest.approx(1.0, abs=0.05)
    bad = dict(doc, response={"red": [0.0] * 10})
    (tmp_path / "bad.json").write_text(json.dumps(bad))
    with pytest.raises(InputFormatError, match="not a valid device profile"):
        camera.load_profile(tmp_path / "bad.json")


def test_robertson_three_channel_and_one_channel_refused(srgb_bracket):
    _scene, images = srgb_bracket
    curve = recover_response(images, EXPOSURES, method="robertson")
    truth = _srgb_decode(np.arange(256) / 255.0)
    # Sanity bound, not an accuracy claim: on this scene OpenCV's Robertson comes out
    # 8-9 % below the sRGB curve over the mid-tones (Debevec: under 2 %), so Debevec is
    # the default. A broken run (NaN, reversed channels, wrong scale) fails this.
    assert np.all(np.isfinite(curve.response)) and np.all(np.diff(curve.response, axis=0) >= 0)
    for c in range(3):
        np.testing.assert_allclose(curve.response[40:221, c], truth[40:221], rtol=0.12)
    # OpenCV's Robertson crashes on one channel (CAMERA_NOTES 3); we refuse it instead.
    with pytest.raises(InputFormatError, match="3-channel"):
        recover_response([im[..., 1] for im in images], EXPOSURES, method="robertson")


def test_bracket_input_errors(srgb_bracket):
    _scene, images = srgb_bracket
    with pytest.raises(InputFormatError, match="8-bit"):
        recover_response([im.astype(np.uint16) for im in images], EXPOSURES)
    with pytest.raises(InputFormatError, match="exposure times"):
        recover_response(images, EXPOSURES[:3])
    with pytest.raises(ShapeMismatchError):
        recover_response([images[0], images[1][:50]], EXPOSURES[:2])


# ---------------------------------------------------------------- folders and the CLI
def _exif_bytes(exposure_s: float | None) -> bytes:
    ex = Image.Exif()
    ex[0x010F] = "TernCam"
    ex[0x0110] = "T-1"
    if exposure_s is not None:
        f = Fraction(exposure_s).limit_denominator(10**6)
        ex.get_ifd(ExifTags.IFD.Exif)[0x829A] = TiffImagePlugin.IFDRational(f.numerator,
                                                                            f.denominator)
    return ex.tobytes()


def _write_flat_folder(folder: Path, sim, *, manifest: bool = True,
                       photons: bool = False) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    rows = ["file,role,exposure_s,photons" if photons else "file,role,exposure_s"]
    for i, t in enumerate(sim.exposure_s):
        for role, frames in (("flat", sim.flats[i]), ("dark", sim.darks[i])):
            for j, arr in enumerate(frames):
                name = f"{role}_{i:02d}_{j}.png"
                Image.fromarray(arr).save(folder / name, exif=_exif_bytes(float(t) or 1e-6))
                extra = f",{float(sim.photons[i])!r}" if photons else ""
                rows.append(f"{name},{role},{float(t)!r}{extra}")
    if manifest:
        (folder / "levels.csv").write_text("\n".join(rows) + "\n")
    return folder


@pytest.fixture(scope="module")
def cli_sensor():
    return simulate_flat_pairs(shape=(96, 96), seed=21,
                               exposure_s=np.linspace(0, 0.0165, 24))


def test_cli_photon_transfer(cli_sensor, tmp_path, capsys):
    folder = _write_flat_folder(tmp_path / "flats", cli_sensor)
    out = tmp_path / "out"
    rc = main(["camera", str(folder), "--out", str(out), "--max-code", "4095"])
    captured = capsys.readouterr()
    assert rc == 0, captured.err
    assert "linear model of EMVA 1288 applies" in captured.out
    assert "Linearity error LE" in captured.out
    doc = json.loads((out / "camera.json").read_text())
    # Gain of the simulated sensor (truth 0.45 DN/e-); 96x96 pixels, so 5 %.
    assert doc["system_gain_dn_per_e"] == pytest.approx(0.45, rel=0.05)
    assert doc["temporal_dark_noise_e"] == pytest.approx(2.8, rel=0.05)
    assert doc["standard"] == "EMVA 1288 Release 4.0 Linear"
    assert len(doc["levels"]) == 24
    for name in ("ptc.png", "linearity.png", "snr.png"):
        assert (out / name).stat().st_size > 1000
    # Same numbers as the array API on the same data.
    res = photon_transfer([f[:2] for f in cli_sensor.flats],
                          [d[:2] for d in cli_sensor.darks], cli_sensor.exposure_s,
                          max_code=4095)
    assert doc["system_gain_dn_per_e"] == pytest.approx(res.gain_dn_per_e, rel=1e-12)


def test_manifest_photons_give_quantum_efficiency(cli_sensor, tmp_path):
    # EMVA 1288 Eq. 49 (responsivity, zero offset) and Eq. 52 (eta = R/K); truth eta = 0.6.
    folder = _write_flat_folder(tmp_path / "p", cli_sensor, photons=True)
    res = camera.measure_photon_transfer(folder, max_code=4095)
    assert res.h_unit == "photons" and res.responsivity_unit == "DN/photon"
    assert res.eta == pytest.approx(0.6, rel=0.05)
    assert res.responsivity == pytest.approx(0.45 * 0.6, rel=0.03)
    assert res.sensitivity_threshold_photons == pytest.approx(
        res.sensitivity_threshold_e / res.eta)


def test_dark_current_from_dark_exposure_series():
    # EMVA 1288 Eqs. 29-30: dark signal and dark variance grow linearly with exposure time;
    # their slopes / K (and / K^2) give the dark current in e-/s. Truth: 200 e-/s.
    sim = simulate_flat_pairs(shape=(128, 128), exposure_s=np.linspace(0, 2, 30),
                              photon_flux_per_s=9000, dark_current_e_per_s=200, seed=6)
    res = photon_transfer([f[:2] for f in sim.flats], [d[:2] for d in sim.darks],
                          sim.exposure_s, max_code=sim.truth.max_code)
    assert res.dark_current_e_per_s == pytest.approx(200, rel=0.03)
    assert res.dark_current_variance_e_per_s == pytest.approx(200, rel=0.1)


def test_lower_sensor_maximum_is_pointed_out():
    # 12-bit data judged against a 16-bit maximum: saturation is never "reached", and the
    # result says which code the pixels pile up at.
    sim = simulate_flat_pairs(shape=(32, 32), exposure_s=np.linspace(0, 0.02, 10), seed=7)
    with pytest.warns(camera.CameraWarning, match="probably 4095"):
        res = photon_transfer([f[:2] for f in sim.flats], [d[:2] for d in sim.darks],
                              sim.exposure_s, max_code=65535)
    assert res.saturation.method == "not_reached"
    assert any("--max-code" in n for n in res.notes)


def test_folder_stacks_give_dsnu_and_prnu(tmp_path):
    # EMVA 1288 Eqs. 66-67 from stacks of 16 frames found in the manifest; truth is the
    # simulation's realised DSNU map (e-) and PRNU map (relative gain).
    sim = simulate_flat_pairs(shape=(64, 64), exposure_s=[0.0, 0.004, 0.007, 0.011, 0.0145,
                                                          0.016], prnu=0.01, dsnu_e=6.0,
                              frames_per_level=16, dark_frames_per_level=16, seed=12)
    folder = _write_flat_folder(tmp_path / "stack", sim)
    res = camera.measure_photon_transfer(folder, max_code=4095)
    nu = res.nonuniformity
    assert nu.method == "stack" and nu.n_dark_frames == 16 and nu.n_bright_frames == 16
    assert 0.3 < nu.bright_fraction_of_saturation < 0.7
    assert nu.dsnu_e == pytest.approx(np.std(sim.dsnu_map), rel=0.1)
    assert nu.prnu_pct == pytest.approx(100 * np.std(sim.prnu_map), rel=0.1)


def test_planes_of_raw_and_colour_frames():
    # Raw mosaics are analysed on one CFA colour's photosites (a regular 2x2 lattice);
    # colour stills on one channel; the region crops the analysed plane.
    from ecl_quant.frames import Frame

    mosaic = np.arange(8 * 10, dtype=np.uint16).reshape(8, 10)
    cfa = np.tile(np.array([[0, 1], [3, 2]], dtype=np.uint8), (4, 5))  # R G / G2 B
    raw = Frame(index=0, time_s=0.0, data=mosaic, max_code=1023, source="r.dng", kind="raw",
                cfa=cfa)
    np.testing.assert_array_equal(camera._plane(raw, "green", None), mosaic[0::2, 1::2])
    np.testing.assert_array_equal(camera._plane(raw, "blue", None), mosaic[1::2, 1::2])
    np.testing.assert_array_equal(camera._plane(raw, "red", (1, 1, 2, 2)), mosaic[2:6:2, 2:6:2])
    rgb = Frame(index=0, time_s=0.0, data=np.dstack([mosaic] * 3).astype(np.uint16) * [1, 2, 3],
                max_code=65535, source="c.tif")
    np.testing.assert_array_equal(camera._plane(rgb, "auto", None), mosaic * 2)
    with pytest.raises(InputFormatError, match="does not fit"):
        camera._plane(rgb, "red", (5, 5, 10, 10))


def test_cli_exif_grouping_with_dark_folder(cli_sensor, tmp_path, capsys):
    flats = tmp_path / "f"
    darks = tmp_path / "d"
    flats.mkdir()
    darks.mkdir()
    for i, t in enumerate(cli_sensor.exposure_s[:12]):
        for j in range(2):
            ex = _exif_bytes(float(t) or 1e-6)
            Image.fromarray(cli_sensor.flats[i][j]).save(flats / f"f{i}_{j}.png", exif=ex)
            Image.fromarray(cli_sensor.darks[i][j]).save(darks / f"d{i}_{j}.png", exif=ex)
    rc = main(["camera", str(flats), "--dark", str(darks), "--out", str(tmp_path / "o"),
               "--max-code", "4095", "--quiet"])
    captured = capsys.readouterr()
    assert rc == 0, captured.err
    doc = json.loads((tmp_path / "o" / "camera.json").read_text())
    assert doc["n_levels"] == 12
    assert doc["saturation"]["method"] == "not_reached"  # only the lower half was given


def _assert_one_line_error(rc: int, err: str, needle: str) -> None:
    assert rc == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert needle in lines[0]


def test_cli_bad_flat_input(cli_sensor, tmp_path, capsys):
    sim = cli_sensor
    # Unequal sizes within a pair.
    f1 = _write_flat_folder(tmp_path / "a", sim)
    Image.fromarray(sim.flats[3][1][:80]).save(f1 / "flat_03_1.png")
    rc = main(["camera", str(f1), "--out", str(tmp_path / "o1")])
    _assert_one_line_error(rc, capsys.readouterr().err, "flat_03_1.png")
    # A single frame at one level.
    f2 = _write_flat_folder(tmp_path / "b", sim)
    lines = (f2 / "levels.csv").read_text().splitlines()
    (f2 / "levels.csv").write_text("\n".join(l for l in lines if "flat_05_1" not in l) + "\n")
    rc = main(["camera", str(f2), "--out", str(tmp_path / "o2")])
    _assert_one_line_error(rc, capsys.readouterr().err, "two images per level")
    # Too few levels to fit.
    f3 = tmp_path / "c"
    _write_flat_folder(f3, sim)
    keep = [l for l in (f3 / "levels.csv").read_text().splitlines()
            if l.startswith("file") or "_00_" in l or "_01_" in l]
    (f3 / "levels.csv").write_text("\n".join(keep) + "\n")
    rc = main(["camera", str(f3), "--out", str(tmp_path / "o3")])
    _assert_one_line_error(rc, capsys.readouterr().err, "at least 3")
    # All frames saturated.
    sat = simulate_flat_pairs(shape=(16, 16), exposure_s=[0.02, 0.03, 0.04], seed=0)
    f4 = _write_flat_folder(tmp_path / "d", sat)
    rc = main(["camera", str(f4), "--out", str(tmp_path / "o4"), "--max-code", "4095"])
    _assert_one_line_error(rc, capsys.readouterr().err, "all frames saturated")


def _write_bracket(folder: Path, images, exposures) -> None:
    folder.mkdir()
    for i, im in enumerate(images):
        t = None if exposures is None else float(exposures[i])
        Image.fromarray(im).save(folder / f"b{i:02d}.png", exif=_exif_bytes(t))


def test_cli_bracket_profile(srgb_bracket, tmp_path, capsys):
    _scene, images = srgb_bracket
    with_exif = tmp_path / "bx"
    _write_bracket(with_exif, images, EXPOSURES)
    out = tmp_path / "phone.json"
    rc = main(["camera", "--bracket", str(with_exif), "--profile", str(out)])
    captured = capsys.readouterr()
    assert rc == 0, captured.err
    prof = camera.load_profile(out)
    assert prof.make == "TernCam" and prof.model == "T-1"
    np.testing.assert_allclose(prof.exposure_s, EXPOSURES, rtol=1e-6)
    truth = _srgb_decode(np.arange(256) / 255.0)
    np.testing.assert_allclose(prof.response["green"][40:221], truth[40:221], rtol=0.03)
    # No EXIF exposure: --exposures gives the times; without it, a one-line error.
    bare = tmp_path / "bn"
    _write_bracket(bare, images, None)
    rc = main(["camera", "--bracket", str(bare), "--profile", str(tmp_path / "x.json")])
    _assert_one_line_error(rc, capsys.readouterr().err, "--exposures")
    listed = ",".join(f"1/{int(round(1 / t))}" if t < 1 else "1" for t in EXPOSURES)
    rc = main(["camera", "--bracket", str(bare), "--profile", str(tmp_path / "y.json"),
               "--exposures", listed, "--quiet"])
    assert rc == 0, capsys.readouterr().err
    assert camera.load_profile(tmp_path / "y.json").exposure_s == pytest.approx(tuple(EXPOSURES))
