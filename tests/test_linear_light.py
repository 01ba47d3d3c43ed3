"""End to end: simulated recordings read back through ecl_quant.frames and radiometry.

The simulator's ground truth is the reference (its own transfer and noise model are
checked against IEC 61966-2-1, ITU-R BT.709, EMVA 1288 and scipy in test_simulate.py).
Here we check that decoding gamma-encoded frames to linear light is what makes spot
ratios right, and that metadata and timestamps survive the round trip.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from ecl_quant.frames import open_recording, read_exif
from ecl_quant.radiometry import channel_values, linear_values, normalise_exposure
from ecl_quant.simulate import RecordingTruth, SimulationSpec, simulate_recording

# Two spots whose true linear intensities differ 8x (amplitudes in FS per frame), on a
# dim card (an ECL reader is a dark box). One second of pre-onset frames for the
# reference keeps the noise of the ratio near 0.5 % (measured over 6 seeds: PNG
# 8.00 +- 0.02, JPEG q95 8.01 +- 0.02, lossless H.264 7.96 +- 0.02).
RATIO = 8.0
TWO_SPOTS = dict(
    n_rows=1,
    n_cols=2,
    amplitudes=(0.06, 0.06 * RATIO),
    size=(64, 96),
    fps=20.0,
    n_frames=80,
    onset_s=1.0,
    rise_s=0.15,
    decay_s=0.5,
    n_hot_pixels=0,
    background_rgb=(0.003, 0.003, 0.0027),
    ambient_fs=0.002,
)


def _spot_integrals(truth: RecordingTruth, *, linear: bool) -> tuple[np.ndarray, np.ndarray]:
    """Net red spot sums integrated over time (trapezoid on the frames' own times).

    The pre-onset frames give the per-spot reference (dark + card + ambient), as the
    pipeline does without darks (common practice). Each spot is summed over a disk of
    radius ``radius_px + 10 edge_px``, where the profile has fallen below 5e-5.
    """
    rec = open_recording(truth.path)
    spots = truth.spots
    r_sum = spots[0].radius_px + 10 * spots[0].edge_px
    half = int(np.ceil(r_sum)) + 1
    regions, masks = [], []
    for s in spots:
        cx, cy = round(s.x_px), round(s.y_px)
        rows, cols = slice(cy - half, cy + half + 1), slice(cx - half, cx + half + 1)
        yy, xx = np.mgrid[rows, cols]
        regions.append((rows, cols))
        masks.append(np.hypot(xx - s.x_px, yy - s.y_px) <= r_sum)
    times, sums = [], []
    for frame in rec.frames():
        row = []
        for region, mask in zip(regions, masks):
            if linear:
                v = normalise_exposure(
                    linear_values(frame, "red", "auto", region=region), frame.exposure_s
                )
            else:
                v = channel_values(frame, "red", region=region)  # encoded codes / max
            row.append(float(v[mask].sum(dtype=np.float64)))
        times.append(frame.time_s)
        sums.append(row)
    t, s = np.array(times), np.array(sums)
    before = t < spots[0].onset_s - 0.05
    net = s - s[before].mean(axis=0)
    return np.trapezoid(net, t, axis=0), t


@pytest.mark.parametrize("encoding", ["png", "jpeg", "tiff16"])
def test_decoded_spot_ratio_is_linear(tmp_path: Path, encoding: str) -> None:
    spec = SimulationSpec(encoding=encoding, jpeg_quality=95, **TWO_SPOTS)  # type: ignore[arg-type]
    truth = simulate_recording(tmp_path / "rec", spec)
    integ, _ = _spot_integrals(truth, linear=True)
    # sRGB decoding (IEC 61966-2-1; 16-bit TIFF: linear) restores proportionality: 8x
    # within 2 %.
    assert integ[1] / integ[0] == pytest.approx(RATIO, rel=0.02)
    # And the unit convention: (FS/s) x s, as in the truth, within 3 % (trapezoid at
    # 20 frames/s, 8-bit quantisation, noise).
    for got, s in zip(integ, truth.spots):
        assert got == pytest.approx(s.integral, rel=0.03)
    raw, _ = _spot_integrals(truth, linear=False)
    if encoding == "tiff16":
        # Linear 16-bit codes need no decoding: the codes themselves keep the ratio.
        assert raw[1] / raw[0] == pytest.approx(RATIO, rel=0.02)
    else:
        # Without decoding, the encoded codes compress the ratio (towards 8**(1/2.4) =
        # 2.4 on a black card; 3.80 +- 0.05 measured on this dim card).
        assert raw[1] / raw[0] < 4.0


@pytest.mark.parametrize("encoding", ["jpeg", "png", "tiff16"])
def test_exposure_metadata_round_trip(tmp_path: Path, encoding: str) -> None:
    spec = SimulationSpec(
        encoding=encoding,  # type: ignore[arg-type]
        exposure_s=1 / 60,
        iso=320,
        exposure_change=(7, 1 / 120),
        vfr=True,
        n_frames=15,
        size=(64, 96),
        n_rows=1,
        n_cols=2,
    )
    truth = simulate_recording(tmp_path / "rec", spec)
    requested = [1 / 60] * 7 + [1 / 120] * 8
    assert list(truth.frame_exposure_s) == pytest.approx(requested, rel=1e-12)
    for i, path in enumerate(truth.files):
        info = read_exif(path)
        assert info.exposure_s == pytest.approx(truth.frame_exposure_s[i], rel=1e-9)
        assert info.iso == truth.iso
        assert info.has_subsec
    frames = list(open_recording(truth.path).frames())
    assert [f.exposure_s for f in frames] == pytest.approx(list(truth.frame_exposure_s), rel=1e-9)
    assert [f.iso for f in frames] == [truth.iso] * len(frames)
    # Capture times: EXIF DateTimeOriginal + SubSecTimeOriginal, 1 ms resolution.
    np.testing.assert_allclose([f.time_s for f in frames], truth.frame_times_s, atol=1e-6)


def test_vfr_video_timestamps(tmp_path: Path) -> None:
    spec = SimulationSpec(
        encoding="h264", vfr=True, fps=30.0, n_frames=40, size=(64, 96), n_rows=1, n_cols=2, crf=20
    )
    truth = simulate_recording(tmp_path / "rec.mp4", spec)
    rec = open_recording(truth.path)
    times = np.array([f.time_s for f in rec.frames()])
    expected = np.array(truth.frame_times_s)
    assert times.shape == expected.shape
    steps = np.diff(expected)
    assert steps.max() / steps.min() > 1.5  # the recording is really VFR
    # Within half a frame interval (the brief), and in fact exact: pts pass through.
    assert np.abs(times - expected).max() < 0.5 * steps.min()
    np.testing.assert_allclose(times, expected, atol=1e-6)
    # index / nominal fps would be wrong by more than a frame somewhere.
    assert np.abs(np.arange(40) / 30.0 - expected).max() > steps.min()


def test_decoded_video_spot_ratio(tmp_path: Path) -> None:
    # Lossless H.264 (crf 0) isolates the colour path: BT.709 Y'CbCr with 4:2:0 chroma,
    # decoded with the inverse BT.709 OETF.
    spec = SimulationSpec(encoding="h264", crf=0, **TWO_SPOTS)  # type: ignore[arg-type]
    truth = simulate_recording(tmp_path / "rec.mp4", spec)
    integ, _ = _spot_integrals(truth, linear=True)
    # Video carries no exposure time, so the sums stay in FS per frame: x exposure_s.
    # 4:2:0 chroma mixes gamma-encoded values at the spot edge: measured bias -1.0 %
    # (bright) and -0.5 % (dim), well inside 3 %.
    for got, s in zip(integ, truth.spots):
        assert got == pytest.approx(s.integral * spec.exposure_s, rel=0.03)
    assert integ[1] / integ[0] == pytest.approx(RATIO, rel=0.02)
    # Encoded limited-range codes: 4.26 +- 0.02 measured; far from 8.
    raw, _ = _spot_integrals(truth, linear=False)
    assert raw[1] / raw[0] < 5.0
