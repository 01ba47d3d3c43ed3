"""The recording simulator against outside references.

References used below: scipy.integrate.quad and scipy.optimize (pulse integral, peak,
spot flux), EMVA 1288 Release 4.0 Linear eq. 14/18/19 (temporal variance from a pair of
flat frames, its relative uncertainty sqrt(2/NM)), scipy.stats (Poisson distribution),
Pillow (EXIF read-back), PyAV (pts, colour tags and decoding), tifffile (16-bit TIFF
read-back), ITU-R BT.709-6 (OETF, luma coefficients, limited range 16..235).
"""

from __future__ import annotations

import datetime as dt
import json
import math
from dataclasses import replace
from pathlib import Path

import av
import cv2
import numpy as np
import pytest
import tifffile
from PIL import ExifTags, Image
from scipy import integrate, optimize, stats

from ecl_quant.errors import InputFormatError, OutputError, SpotError
from ecl_quant.simulate import (
    RecordingTruth,
    SimulationSpec,
    SpotTruth,
    ecl_pulse,
    ecl_pulse_antiderivative,
    load_truth,
    render_linear_frames,
    simulate_darks,
    simulate_recording,
    spot_flux_px,
    spot_profile,
    truth_path,
    write_truth,
)

SMALL = dict(size=(120, 160), n_frames=24)


def _flat_spec(level: float, **kw: object) -> SimulationSpec:
    """No spots, no leak, no hot pixels: a uniform flat field at ``level`` FS."""
    base = dict(
        n_rows=0,
        n_cols=0,
        ambient_fs=0.0,
        n_hot_pixels=0,
        background_rgb=(level,) * 3,
        encoding="tiff16",
        n_frames=2,
    )
    base.update(SMALL)
    base["n_frames"] = 2
    base.update(kw)
    return SimulationSpec(**base)  # type: ignore[arg-type]


# ------------------------------------------------------------------- pulse and flux


@pytest.mark.parametrize(
    "rise_s, decay_s, onset_s", [(0.25, 0.9, 0.5), (0.05, 3.0, 1.2), (1.0, 1.3, 0.0)]
)
def test_pulse_integral_and_peak_match_scipy(rise_s: float, decay_s: float, onset_s: float) -> None:
    kw = dict(onset_s=onset_s, rise_s=rise_s, decay_s=decay_s)
    f = lambda t: float(ecl_pulse(t, **kw))
    # scipy.integrate.quad (reference library): integral from onset to infinity and over a window.
    full, _ = integrate.quad(f, onset_s, np.inf, limit=200)
    assert float(ecl_pulse_antiderivative(np.inf, **kw)) == pytest.approx(full, rel=1e-9)
    part, _ = integrate.quad(f, onset_s - 0.3, onset_s + 1.7, points=[onset_s], limit=200)
    g = ecl_pulse_antiderivative(np.array([onset_s - 0.3, onset_s + 1.7]), **kw)
    assert g[1] - g[0] == pytest.approx(part, rel=1e-9)
    # scipy.optimize (reference library): the maximum is 1, at the documented peak delay.
    res = optimize.minimize_scalar(
        lambda t: -f(t),
        bounds=(onset_s, onset_s + 5 * decay_s),
        method="bounded",
        options={"xatol": 1e-10},
    )
    spec = SimulationSpec(
        n_rows=1, n_cols=1, onset_s=onset_s, rise_s=rise_s, decay_s=decay_s, **SMALL
    )
    truth = simulate_recording_truth_only(spec)
    assert truth.spots[0].peak_time_s == pytest.approx(res.x, abs=1e-6)
    assert -res.fun == pytest.approx(1.0, abs=1e-12)
    assert f(onset_s - 1e-3) == 0.0


def simulate_recording_truth_only(spec: SimulationSpec) -> RecordingTruth:
    # The truth does not depend on the files; a tiny PNG run is the cheapest way to get it.
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        return simulate_recording(Path(tmp) / "rec", replace(spec, encoding="png"))


def test_spot_flux_matches_quad() -> None:
    # scipy.integrate.quad of 2 pi rho w(rho): total flux and the share inside radius_px.
    for radius, edge in [(8.0, 0.35), (5.0, 1.0), (12.0, 0.2)]:

        def w(r: float, radius: float = radius, edge: float = edge) -> float:
            return 2 * math.pi * r * float(spot_profile(r, radius_px=radius, edge_px=edge))

        total, _ = integrate.quad(w, 0, radius + 60 * edge, points=[radius], limit=200)
        inside, _ = integrate.quad(w, 0, radius, limit=200)
        assert spot_flux_px(radius, edge) == pytest.approx(total, rel=1e-9)
        spec = SimulationSpec(
            n_rows=1, n_cols=1, radius_px=radius, edge_px=edge, size=(96, 96), n_frames=3
        )
        s = simulate_recording_truth_only(spec).spots[0]
        assert s.flux_px == pytest.approx(total, rel=1e-9)
        assert s.in_disk_fraction == pytest.approx(inside / total, rel=1e-7)
        assert s.flux_fraction_within(radius + 10 * edge) > 1 - 1e-4


def test_truth_integral_equals_quad_of_the_spot_signal(tmp_path: Path) -> None:
    spec = SimulationSpec(
        rise_s=(0.2, 0.3),
        decay_s=(0.8, 2.5),
        onset_s=(0.4, 0.6),
        amplitudes=(0.05, 0.2),
        n_rows=1,
        n_cols=2,
        **SMALL,
        encoding="png",
    )
    truth = simulate_recording(tmp_path / "rec", spec)
    t0, t1 = truth.frame_times_s[0], truth.frame_times_s[-1]
    for s, amp in zip(truth.spots, (0.05, 0.2)):
        # Net signal = amplitude / exposure (FS/s at the centre) x profile area x pulse.
        def rate(t: float, s: SpotTruth = s, amp: float = amp) -> float:
            pulse = ecl_pulse(t, onset_s=s.onset_s, rise_s=s.rise_s, decay_s=s.decay_s)
            return amp / spec.exposure_s * s.flux_px * float(pulse)

        ref, _ = integrate.quad(rate, t0, t1, points=[s.onset_s], limit=200)  # scipy reference
        full, _ = integrate.quad(rate, s.onset_s, np.inf, limit=200)
        assert s.integral == pytest.approx(ref, rel=1e-9)
        assert s.integral_full == pytest.approx(full, rel=1e-9)
        assert s.integral_in_disk == pytest.approx(ref * s.in_disk_fraction, rel=1e-12)
        assert s.integral_between(t0, t1) == pytest.approx(ref, rel=1e-9)


def test_rendered_spot_sums_follow_the_truth() -> None:
    # Noise made negligible (huge gain, no read noise): the rendered net spot sum of
    # every frame equals the exposure-window integral of the true signal; the trapezoid
    # rule (numpy) over the frames approaches the truth integral.
    spec = SimulationSpec(
        n_rows=1,
        n_cols=2,
        amplitudes=(0.05, 0.3),
        gain_e_per_fs=1e12,
        read_noise_fs=0.0,
        n_hot_pixels=0,
        fps=30.0,
        n_frames=150,
        exposure_s=1 / 60,
        drift_px=1.5,
        size=(64, 96),
        encoding="png",
    )
    truth = simulate_recording_truth_only(spec)
    background = next(iter(render_linear_frames(replace(spec, amplitudes=(0.0, 0.0)))))
    yy, xx = np.mgrid[0:64, 0:96]
    drift = np.array(truth.drift_px)
    sums = []
    for i, f in enumerate(render_linear_frames(spec)):
        net = f[..., 0].astype(np.float64) - background[..., 0]
        # Disk of half the spacing (12 px) around the drifted centre: the spot's tail
        # beyond it is below 1e-5 of its light, and the neighbour's light stays out.
        sums.append(
            [
                net[np.hypot(xx - s.x_px - drift[i, 0], yy - s.y_px - drift[i, 1]) <= 12].sum()
                for s in truth.spots
            ]
        )
    sums = np.array(sums)
    times = np.array(truth.frame_times_s)
    for k, s in enumerate(truth.spots):
        e = spec.exposure_s
        g = ecl_pulse_antiderivative(
            np.stack([times - e / 2, times + e / 2]),
            onset_s=s.onset_s,
            rise_s=s.rise_s,
            decay_s=s.decay_s,
        )
        expected = s.peak_signal * (g[1] - g[0])  # FS per frame
        np.testing.assert_allclose(sums[:, k], expected, rtol=1e-4, atol=1e-4)
        trap = np.trapezoid(sums[:, k] / e, times)  # numpy reference
        assert trap == pytest.approx(s.integral, rel=2e-3)


def _box(s: object, pad: int = 14) -> tuple[slice, slice]:
    x, y = round(s.x_px), round(s.y_px)  # type: ignore[attr-defined]
    return slice(y - pad, y + pad + 1), slice(x - pad, x + pad + 1)


# ----------------------------------------------------------------------------- noise


@pytest.mark.parametrize("shot_noise", ["poisson", "gaussian"])
def test_flat_frame_variance_matches_emva_model(tmp_path: Path, shot_noise: str) -> None:
    # EMVA 1288 R4.0 eq. 14 in FS units: sigma^2 = read^2 + signal/gain (+ quantisation
    # 1/12 code^2); eq. 18 temporal variance from a pair; eq. 19 relative uncertainty
    # sqrt(2/NM). Read back with tifffile (reference library).
    gain, read, dark = 2000.0, 0.002, 0.004
    levels = [0.0, 0.05, 0.2, 0.5]
    measured, predicted = [], []
    for i, level in enumerate(levels):
        spec = _flat_spec(
            level,
            gain_e_per_fs=gain,
            read_noise_fs=read,
            dark_level_fs=dark,
            seed=11 + i,
            shot_noise=shot_noise,
        )
        truth = simulate_recording(tmp_path / f"flat{i}", spec)
        y0, y1 = (tifffile.imread(p).astype(np.float64) / 65535.0 for p in truth.files)
        assert y0.shape == (120, 160, 3)
        nm = y0[..., 0].size
        for c in range(3):
            a, b = y0[..., c], y1[..., c]
            var = np.mean((a - b) ** 2) / 2 - (a.mean() - b.mean()) ** 2 / 2  # EMVA eq. 18
            expect = read**2 + level / gain + (1 / 65535) ** 2 / 12
            assert var == pytest.approx(expect, rel=5 * math.sqrt(2 / nm))  # 5 sigma, eq. 19
            mean = (a.mean() + b.mean()) / 2
            assert mean == pytest.approx(dark + level, abs=5 * math.sqrt(expect / (2 * nm)))
            measured.append(var)
            predicted.append(expect)
    # Photon transfer slope (numpy polyfit, reference): variance vs signal has slope 1/gain.
    sig = np.repeat(levels, 3)
    slope, offset = np.polyfit(sig, measured, 1)
    assert slope == pytest.approx(1 / gain, rel=0.03)
    assert offset == pytest.approx(read**2, rel=0.05)


def test_shot_noise_is_poisson(tmp_path: Path) -> None:
    # With no read noise and a small gain, value * gain is the electron count; its
    # histogram matches scipy.stats.poisson (chi-square goodness of fit).
    gain, level = 50.0, 0.1  # mean 5 electrons
    spec = _flat_spec(level, gain_e_per_fs=gain, read_noise_fs=0.0, dark_level_fs=0.0, seed=3)
    truth = simulate_recording(tmp_path / "flat", spec)
    y = tifffile.imread(truth.files[0]).astype(np.float64) / 65535.0
    counts = np.rint(y * gain).astype(int).ravel()
    np.testing.assert_allclose(counts / gain, y.ravel(), atol=0.6 / 65535)  # integer electrons
    mu = level * gain
    k = np.arange(0, 15)
    observed = np.array([np.sum(counts == v) for v in k[:-1]] + [np.sum(counts >= k[-1])])
    probs = np.append(stats.poisson.pmf(k[:-1], mu), stats.poisson.sf(k[-1] - 1, mu))
    chi2, p = stats.chisquare(observed, probs * counts.size)
    assert p > 1e-4, (chi2, p)


def test_reproducible_and_seed_dependent(tmp_path: Path) -> None:
    spec = SimulationSpec(encoding="png", drift_px=1.0, vfr=True, **SMALL)
    a = simulate_recording(tmp_path / "a", spec)
    b = simulate_recording(tmp_path / "b", spec)
    c = simulate_recording(tmp_path / "c", replace(spec, seed=1))
    for fa, fb in zip(a.files, b.files):
        assert np.array_equal(np.asarray(Image.open(fa)), np.asarray(Image.open(fb)))
    assert not np.array_equal(
        np.asarray(Image.open(a.files[5])), np.asarray(Image.open(c.files[5]))
    )
    assert a.to_dict() | {"path": "", "files": []} == b.to_dict() | {"path": "", "files": []}
    assert a.hot_pixels != c.hot_pixels


def test_darks_share_hot_pixels_and_dark_level(tmp_path: Path) -> None:
    spec = SimulationSpec(
        encoding="tiff16", n_hot_pixels=5, dark_level_fs=0.01, read_noise_fs=0.001, **SMALL
    )
    rec = simulate_recording(tmp_path / "rec", spec)
    darks = simulate_darks(tmp_path / "darks", spec, 6)
    assert darks.is_dark and darks.spots == () and len(darks.files) == 6
    assert darks.hot_pixels == rec.hot_pixels
    stack = np.stack([tifffile.imread(p).astype(np.float64) / 65535 for p in darks.files])
    med = np.median(stack, axis=0)
    hot = np.zeros(med.shape[:2], bool)
    for x, y, v in darks.hot_pixels:
        hot[y, x] = True
        np.testing.assert_allclose(med[y, x], min(0.01 + v, 1.0), atol=0.002)
    # Away from hot pixels: dark level with read noise (mean of 6 x 19200 samples).
    assert med[~hot].mean() == pytest.approx(0.01, abs=1e-4)
    assert stack[:, ~hot].std() == pytest.approx(0.001, rel=0.02)
    # Independent noise: dark frames differ from each other.
    assert not np.array_equal(stack[0], stack[1])


def test_drift_moves_the_spots_by_the_recorded_shift() -> None:
    spec = SimulationSpec(
        n_rows=1,
        n_cols=1,
        amplitudes=(0.5,),
        gain_e_per_fs=1e12,
        read_noise_fs=0.0,
        n_hot_pixels=0,
        ambient_fs=0.0,
        drift_px=2.5,
        size=(64, 64),
        n_frames=40,
        onset_s=-1.0,
        encoding="png",
    )
    truth = simulate_recording_truth_only(spec)
    drift = np.array(truth.drift_px)
    assert np.abs(drift).max() == pytest.approx(2.5)
    assert np.array_equal(drift[0], [0.0, 0.0])
    s = truth.spots[0]
    yy, xx = np.mgrid[0:64, 0:64]
    for i, f in enumerate(render_linear_frames(spec)):
        net = f[..., 0] - f[0, 0, 0]  # the corner is background only
        cx, cy = (net * xx).sum() / net.sum(), (net * yy).sum() / net.sum()
        assert cx == pytest.approx(s.x_px + drift[i, 0], abs=0.02)
        assert cy == pytest.approx(s.y_px + drift[i, 1], abs=0.02)


def test_saturated_spot_is_clipped_and_reported() -> None:
    spec = SimulationSpec(saturate_spot=3, encoding="png", **SMALL)
    truth = simulate_recording_truth_only(spec)
    assert truth.saturated_spots == (3,)
    s3 = truth.spots[2]
    assert s3.saturated and s3.amplitude_fs == 1.5 and s3.saturated_frames
    peak = max(render_linear_frames(spec), key=lambda f: f[..., 0].max())
    assert peak[..., 0][_box(s3, 4)].max() == 1.0
    assert not any(s.saturated for s in truth.spots if s.number != 3)


# -------------------------------------------------------------------------- metadata


def test_jpeg_exif_reads_back_with_pillow(tmp_path: Path) -> None:
    spec = SimulationSpec(
        encoding="jpeg",
        exposure_s=1 / 50,
        iso=400,
        vfr=True,
        fps=15.0,
        exposure_change=(10, 1 / 100),
        start_time="2024-05-14T09:30:58.500",
        **SMALL,
    )
    truth = simulate_recording(tmp_path / "jpg", spec)
    start = dt.datetime(2024, 5, 14, 9, 30, 58, 500000)
    assert len(truth.files) == spec.n_frames
    for i, path in enumerate(truth.files):
        exif = Image.open(path).getexif()  # Pillow, reference reader
        sub = exif.get_ifd(ExifTags.IFD.Exif)
        expected_e = 1 / 50 if i < 10 else 1 / 100
        assert float(sub[ExifTags.Base.ExposureTime]) == pytest.approx(expected_e, rel=1e-9)
        assert truth.frame_exposure_s[i] == pytest.approx(expected_e, rel=1e-12)
        assert int(sub[ExifTags.Base.ISOSpeedRatings]) == 400
        when = dt.datetime.strptime(sub[ExifTags.Base.DateTimeOriginal], "%Y:%m:%d %H:%M:%S")
        when += dt.timedelta(milliseconds=int(sub[ExifTags.Base.SubsecTimeOriginal]))
        assert (when - start).total_seconds() == pytest.approx(truth.frame_times_s[i], abs=1e-9)
        assert exif[ExifTags.Base.Orientation] == 1
    steps = np.diff(truth.frame_times_s)
    assert steps.min() > 0 and steps.max() - steps.min() > 0.01  # really irregular


def test_tiff16_is_linear_with_exif(tmp_path: Path) -> None:
    # tifffile and OpenCV (reference readers) agree on the pixels; the Exif IFD is read by
    # Pillow and tifffile; codes / 65535 are the linear values (TIFF 6.0 baseline RGB).
    spec = _flat_spec(
        0.25,
        read_noise_fs=0.0,
        gain_e_per_fs=1e12,
        dark_level_fs=0.0,
        iso=800,
        exposure_s=1 / 125,
        n_frames=3,
        vfr=True,
    )
    truth = simulate_recording(tmp_path / "tif", spec)
    start = dt.datetime(2024, 5, 14, 9, 30, 0)
    for i, path in enumerate(truth.files):
        a = tifffile.imread(path)
        b = cv2.imread(path, cv2.IMREAD_UNCHANGED)[..., ::-1]
        assert a.dtype == np.uint16 and a.shape == (120, 160, 3)
        assert np.array_equal(a, b)
        np.testing.assert_allclose(a / 65535.0, 0.25, atol=0.6 / 65535)
        with Image.open(path) as im:
            sub = im.getexif().get_ifd(ExifTags.IFD.Exif)
        assert float(sub[ExifTags.Base.ExposureTime]) == pytest.approx(1 / 125)
        assert int(sub[ExifTags.Base.ISOSpeedRatings]) == 800
        when = dt.datetime.strptime(sub[ExifTags.Base.DateTimeOriginal], "%Y:%m:%d %H:%M:%S")
        when += dt.timedelta(milliseconds=int(sub[ExifTags.Base.SubsecTimeOriginal]))
        assert (when - start).total_seconds() == pytest.approx(truth.frame_times_s[i], abs=1e-9)
        with tifffile.TiffFile(path) as tf:
            assert tf.pages[0].tags["ExifTag"].value["ExposureTime"] == (1, 125)
    assert truth.encoding["transfer"] == "linear"


def test_png_is_srgb_encoded_linear_light(tmp_path: Path) -> None:
    # IEC 61966-2-1 decoding of the PNG codes of a flat field gives back the linear level.
    level = 0.2
    spec = _flat_spec(
        level, encoding="png", read_noise_fs=0.0, gain_e_per_fs=1e12, dark_level_fs=0.0
    )
    truth = simulate_recording(tmp_path / "png", spec)
    v = np.asarray(Image.open(truth.files[0])).astype(np.float64) / 255
    lin = np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)
    assert truth.encoding["transfer"] == "srgb"
    np.testing.assert_allclose(lin, level, rtol=0.01)  # 8-bit step at 0.2 is 0.8 %


def test_vfr_video_pts_and_colour_tags(tmp_path: Path) -> None:
    spec = SimulationSpec(encoding="h264", vfr=True, fps=30.0, crf=12, n_frames=30, size=(120, 160))
    truth = simulate_recording(tmp_path / "rec.mp4", spec)
    with av.open(truth.files[0]) as container:  # PyAV, reference reader
        stream = container.streams.video[0]
        cc = stream.codec_context
        # BT.709 matrix / primaries / transfer, MPEG (limited) range: H.273 code 1.
        assert (
            int(cc.colorspace),
            int(cc.color_primaries),
            int(cc.color_trc),
            int(cc.color_range),
        ) == (1, 1, 1, 1)
        frames = list(container.decode(video=0))
        times = np.array([f.time for f in frames])
        pts600 = np.array([f.pts * f.time_base * 600 for f in frames], dtype=np.float64)
        rgb = frames[0].to_ndarray(format="rgb24").astype(np.float64)
        y = frames[0].to_ndarray()[:120].astype(np.float64)
    np.testing.assert_allclose(times - times[0], truth.frame_times_s, atol=1e-9)
    np.testing.assert_allclose(pts600, np.rint(pts600))  # whole ticks of 1/600 s
    steps = np.diff(times)
    assert steps.max() / steps.min() > 1.5  # variable frame rate
    assert truth.encoding["time_base"] == "1/600" and truth.encoding["vfr"] is True
    # Decoding with the stream's own tags gives back the BT.709 OETF of the scene: on the
    # uniform card (corner away from the ambient glow and spots), mean within 2 codes.
    first = next(iter(render_linear_frames(spec)))
    lin = first[:12, :12].astype(np.float64).mean(axis=(0, 1))
    e = np.where(lin < 0.018, 4.5 * lin, 1.099 * lin**0.45 - 0.099)  # ITU-R BT.709 OETF
    np.testing.assert_allclose(rgb[:12, :12].mean(axis=(0, 1)), 255 * e, atol=2.0)
    luma = 16 + 219 * (0.2126 * e[0] + 0.7152 * e[1] + 0.0722 * e[2])  # BT.709 Y', limited
    assert y[:12, :12].mean() == pytest.approx(luma, abs=1.0)


def test_cfr_video_and_bitrate_option(tmp_path: Path) -> None:
    spec = SimulationSpec(
        encoding="h264", fps=25.0, crf=None, bitrate=200_000, n_frames=20, size=(120, 160)
    )
    truth = simulate_recording(tmp_path / "cfr.mp4", spec)
    with av.open(truth.files[0]) as container:
        times = np.array([f.time for f in container.decode(video=0)])
    np.testing.assert_allclose(times - times[0], np.arange(20) / 25.0, atol=1e-9)
    assert truth.encoding["bitrate"] == 200_000 and "crf" not in truth.encoding


# ----------------------------------------------------------------- truth and errors


def test_truth_json_round_trip(tmp_path: Path) -> None:
    truth = simulate_recording(
        tmp_path / "card", SimulationSpec(encoding="png", drift_px=1.0, **SMALL)
    )
    dest = write_truth(truth)
    assert dest == tmp_path / "card.truth.json" == truth_path(tmp_path / "card")
    assert truth_path(tmp_path / "run.mp4") == tmp_path / "run.truth.json"
    data = json.loads(dest.read_text())
    assert data["spots"][0]["number"] == 1 and len(data["spots"]) == 8
    assert load_truth(dest) == truth
    table = truth.to_frame()
    assert list(table["number"]) == list(range(1, 9))
    assert SimulationSpec.from_dict(truth.spec) == SimulationSpec(
        encoding="png", drift_px=1.0, **SMALL
    )
    bad = tmp_path / "bad.json"
    bad.write_text('{"spots": 3}')
    with pytest.raises(InputFormatError):
        load_truth(bad)


def test_spots_are_row_major(tmp_path: Path) -> None:
    truth = simulate_recording_truth_only(SimulationSpec(n_rows=2, n_cols=3, **SMALL))
    xy = [(s.row, s.col, s.x_px, s.y_px) for s in truth.spots]
    assert [(r, c) for r, c, _, _ in xy] == [(0, 0), (0, 1), (0, 2), (1, 0), (1, 1), (1, 2)]
    assert xy[0][2] < xy[1][2] < xy[2][2] and xy[0][3] < xy[3][3]
    assert xy[1][2] - xy[0][2] == pytest.approx(24.0)  # default spacing 3 x radius


@pytest.mark.parametrize(
    "kw, err",
    [
        (dict(amplitudes=(0.1, 0.2)), InputFormatError),
        (dict(rise_s=1.0, decay_s=0.5), InputFormatError),
        (dict(encoding="gif"), InputFormatError),
        (dict(encoding="h264", size=(121, 160)), InputFormatError),
        (dict(radius_px=30.0), SpotError),
        (dict(saturate_spot=9), SpotError),
        (dict(fps=0.0), InputFormatError),
    ],
)
def test_bad_options_raise_typed_errors(kw: dict[str, object], err: type[Exception]) -> None:
    with pytest.raises(err):
        SimulationSpec(**kw)  # type: ignore[arg-type]


def test_existing_output_is_not_overwritten(tmp_path: Path) -> None:
    spec = SimulationSpec(encoding="png", n_frames=2)
    simulate_recording(tmp_path / "rec", spec)
    with pytest.raises(OutputError):
        simulate_recording(tmp_path / "rec", spec)
    simulate_recording(tmp_path / "rec", spec, overwrite=True)
