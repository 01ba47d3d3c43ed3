"""measure(): simulated spot cards with known truth, the CLI, outputs and bad input.

Outside references: the project's simulator (ecl_quant.simulate) supplies exact ground
truth (closed-form integrals and peak times of the pulse it renders); the log-log slope and
R^2 are computed with numpy.polyfit / numpy.corrcoef (reference library); the figures of
merit are checked against scipy.integrate.trapezoid in test_curves.py.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ecl_quant.cli import main
from ecl_quant.errors import NoSpotsWarning, OutputError, SpotError
from ecl_quant.measure import (
    CURVES_COLUMNS,
    OUTPUT_FILES,
    SPOTS_COLUMNS,
    MeasureSettings,
    measure,
    write_measure_outputs,
)
from ecl_quant.simulate import SimulationSpec, simulate_darks, simulate_recording
from ecl_quant.spots import load_spots

# A 3 x 3 card whose spot amplitudes span 32x, with dark offset, read and shot noise,
# ambient light leak, hot pixels and a hand tremor of 3 px; the pulse starts at 1 s so
# that 30 pre-emission frames give the baseline.
AMPLITUDES = tuple(0.015 * np.geomspace(1.0, 32.0, 9))
CARD = dict(size=(240, 320), n_rows=3, n_cols=3, radius_px=10.0, spacing_px=50.0,
            amplitudes=AMPLITUDES, drift_px=3.0, n_frames=150, fps=30.0, onset_s=1.0,
            dark_level_fs=0.004, ambient_fs=0.02, read_noise_fs=0.001, n_hot_pixels=3)


def _loglog(truth, result):
    x = np.log([s.integral for s in truth.spots])
    y = np.log(result.spots_table["integral"].to_numpy(dtype=float))
    slope = np.polyfit(x, y, 1)[0]
    r2 = np.corrcoef(x, y)[0, 1] ** 2
    return slope, r2


def _check_row_major(truth, result):
    tab = result.spots_table
    assert len(tab) == 9
    assert tab["spot"].tolist() == list(range(1, 10))
    # Spot coordinates are relative to the card position at the first frame with
    # structure, so compare after removing one common offset (at most the drift).
    tx = np.array([s.x_px for s in truth.spots])
    ty = np.array([s.y_px for s in truth.spots])
    dx = tab["x_px"].to_numpy() - tx
    dy = tab["y_px"].to_numpy() - ty
    assert np.abs(np.median(dx)) <= 3.5 and np.abs(np.median(dy)) <= 3.5
    assert np.abs(dx - np.median(dx)).max() < 1.0
    assert np.abs(dy - np.median(dy)).max() < 1.0


@pytest.fixture(scope="module")
def jpeg_card(tmp_path_factory):
    folder = tmp_path_factory.mktemp("jpeg") / "card"
    truth = simulate_recording(folder, SimulationSpec(**CARD, encoding="jpeg", seed=11))
    return folder, truth, measure(folder)


@pytest.fixture(scope="module")
def h264_card(tmp_path_factory):
    path = tmp_path_factory.mktemp("h264") / "card.mp4"
    # crf 10: a high-quality encode. At crf 18 on this 320x240 frame the encoder lifts the
    # tails of the dimmest pulses by up to ~16 % (measured with the true positions too):
    # the compression bias DOMAIN.md describes, not a measurement error.
    truth = simulate_recording(path, SimulationSpec(**CARD, encoding="h264", crf=10, seed=12))
    return path, truth, measure(path)


@pytest.fixture(scope="module")
def vfr_saturated(tmp_path_factory):
    path = tmp_path_factory.mktemp("vfr") / "vfr.mp4"
    spec = SimulationSpec(**{**CARD, "drift_px": 2.0}, encoding="h264", crf=12, vfr=True,
                          saturate_spot=9, saturate_amplitude=1.6, seed=13)
    truth = simulate_recording(path, spec)
    return path, truth, measure(path)


# ------------------------------------------------------------------ accuracy


def test_jpeg_card_found_row_major_and_linear(jpeg_card):
    _, truth, res = jpeg_card
    _check_row_major(truth, res)
    assert res.spots_table["flags"].eq("").all(), res.spots_table["flags"].tolist()
    slope, r2 = _loglog(truth, res)
    assert slope == pytest.approx(1.0, abs=0.02)
    assert r2 > 0.999
    # Stills carry EXIF exposure: integrals are per second, in the simulator's unit.
    ratio = res.spots_table["integral"].to_numpy() / [s.integral for s in truth.spots]
    assert np.all(np.abs(ratio - 1) < 0.05), ratio
    assert res.provenance["analysis"]["per_exposure"] is True


def test_h264_card_found_row_major_and_linear(h264_card):
    _, truth, res = h264_card
    _check_row_major(truth, res)
    slope, r2 = _loglog(truth, res)
    assert slope == pytest.approx(1.0, abs=0.02)
    assert r2 > 0.999
    assert res.provenance["transfer"]["resolved"] == "bt709"


@pytest.fixture(scope="module")
def png_card_with_dark(tmp_path_factory):
    root = tmp_path_factory.mktemp("png")
    spec = SimulationSpec(**CARD, encoding="png", seed=14)
    truth = simulate_recording(root / "card", spec)
    simulate_darks(root / "darks", spec, n_frames=8)
    return root, truth, measure(root / "card", dark=root / "darks")


def test_integral_se_is_honest_on_lossless_stills(png_card_with_dark):
    # PNG is lossless, so the simulator's sensor model (read + shot noise, EMVA 1288
    # linear model) is what the recording holds: the integral errors against the exact
    # truth, in units of the reported SE, must look standard normal (|z| < 4 for all
    # nine; the sample SD of z within 0.4..1.6). On JPEG the errors are dominated by the
    # compression's systematic lift of dim spots (+1..3 %), which no noise model covers.
    _, truth, res = png_card_with_dark
    err = res.spots_table["integral"].to_numpy() - [s.integral for s in truth.spots]
    z = err / res.spots_table["integral_se"].to_numpy()
    assert np.all(np.abs(z) < 4), z
    assert 0.4 < np.sqrt(np.mean(z**2)) < 1.6, z
    # The gain estimated from the recording (temporal second differences) against the
    # simulator's electrons per full scale.
    gain = res.provenance["analysis"]["noise_model"]["gain_e_per_fs"]
    assert gain == pytest.approx(truth.gain_e_per_fs, rel=0.15)


def test_dark_frames_are_used(png_card_with_dark):
    _, truth, res = png_card_with_dark
    assert res.provenance["inputs"]["dark"]["n_frames"] == 8
    assert len(res.provenance["inputs"]["dark"]["files"]) == 8
    assert res.provenance["detection"]["projection_dark"] == "master dark"
    _check_row_major(truth, res)
    slope, r2 = _loglog(truth, res)
    assert slope == pytest.approx(1.0, abs=0.02)
    assert r2 > 0.999


def test_time_to_peak_on_variable_frame_rate_video(vfr_saturated):
    _, truth, res = vfr_saturated
    times = np.asarray(truth.frame_times_s)
    assert np.ptp(np.diff(times)) > 0.5 / 30  # really variable
    tab = res.spots_table.set_index("spot")
    for s in truth.spots:
        if s.saturated:
            continue
        # One frame interval: the interval of the frames around the true peak.
        k = int(np.searchsorted(times, s.peak_time_s))
        interval = times[min(k, times.size - 1)] - times[max(k - 1, 0)]
        assert abs(tab.loc[s.number, "time_to_peak_s"] - s.peak_time_s) <= interval, s.number


def test_saturated_spot_is_flagged_and_invalid(vfr_saturated):
    _, truth, res = vfr_saturated
    tab = res.spots_table.set_index("spot")
    assert truth.saturated_spots == (9,)
    assert "saturated" in tab.loc[9, "flags"].split(";")
    assert tab.loc[9, "saturated_frames"] > 0
    assert np.isnan(tab.loc[9, "integral"]) and np.isnan(tab.loc[9, "integral_se"])
    assert np.isfinite(tab.loc[9, "integral_raw"])
    assert not res.valid.loc[8]
    others = tab.drop(index=9)
    assert others["integral"].notna().all()
    assert not others["flags"].str.contains("saturated").any()


# ------------------------------------------------------------------ reuse, outputs


def test_saved_spots_give_identical_results(jpeg_card, tmp_path):
    folder, _, res = jpeg_card
    out = tmp_path / "first"
    write_measure_outputs(res, out)
    again = measure(folder, spots=out / "spots.json")
    pd.testing.assert_frame_equal(again.spots_table, res.spots_table)
    pd.testing.assert_frame_equal(again.curves_table, res.curves_table)
    assert again.provenance["spots_source"] == "file"
    assert again.provenance["inputs"]["spots"]["sha256"]


def test_outputs_and_columns(jpeg_card, tmp_path):
    folder, truth, res = jpeg_card
    out = tmp_path / "out"
    written = write_measure_outputs(res, out)
    assert sorted(p.name for p in written) == sorted(OUTPUT_FILES)
    assert sorted(p.name for p in out.iterdir()) == sorted(OUTPUT_FILES)
    spots = pd.read_csv(out / "spots.csv")
    assert list(spots.columns) == list(SPOTS_COLUMNS)
    curves = pd.read_csv(out / "curves.csv")
    assert list(curves.columns) == list(CURVES_COLUMNS)
    assert len(curves) == 9 * len(truth.frame_times_s)
    np.testing.assert_allclose(curves[curves.spot == 1]["time_s"], truth.frame_times_s, atol=1e-9)
    run = json.loads((out / "run.json").read_text())
    files = run["inputs"]["recording"]["files"]
    assert len(files) == len(truth.files) and all(len(f["sha256"]) == 64 for f in files)
    assert run["settings"]["channel"] == "red" and "versions" in run and "timings" in run
    assert run["analysis"]["noise_model"]["source"].startswith("estimated")
    assert len(load_spots(out / "spots.json")) == 9
    for name in ("overlay.png", "curves.png"):
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(OutputError, match="--force"):
        write_measure_outputs(res, out)
    write_measure_outputs(res, out, force=True)


def test_failed_render_leaves_nothing(jpeg_card, tmp_path, monkeypatch):
    import ecl_quant.measure as m

    _, _, res = jpeg_card

    def boom(*a, **k):
        raise RuntimeError("renderer failed")

    monkeypatch.setattr(m, "render_curves", boom)
    out = tmp_path / "out"
    with pytest.raises(RuntimeError):
        write_measure_outputs(res, out)
    assert not out.exists() or not any(out.iterdir())


def test_given_noise_model_is_recorded(jpeg_card):
    folder, _, res = jpeg_card
    spot_set = res.spot_set
    given = measure(folder, spots=spot_set,
                    settings=MeasureSettings(read_var=1e-6, gain=4000.0))
    assert given.provenance["analysis"]["noise_model"]["source"] == "given"
    # Same spots, same sums: only the standard errors change.
    np.testing.assert_allclose(given.spots_table["integral"], res.spots_table["integral"])


def test_log_detection_matches_threshold(jpeg_card):
    folder, _, res = jpeg_card
    log = measure(folder, settings=MeasureSettings(detect="log"))
    assert len(log.spots_table) == 9
    np.testing.assert_allclose(log.spots_table["x_px"], res.spots_table["x_px"], atol=0.5)
    np.testing.assert_allclose(log.spots_table["y_px"], res.spots_table["y_px"], atol=0.5)


# ------------------------------------------------------------------ CLI


def test_cli_measure_writes_reuses_and_refuses(jpeg_card, tmp_path, capsys):
    folder, _, _ = jpeg_card
    out = tmp_path / "m"
    assert main(["measure", str(folder), "--out", str(out), "--quiet"]) == 0
    assert sorted(p.name for p in out.iterdir()) == sorted(OUTPUT_FILES)
    capsys.readouterr()
    assert main(["measure", str(folder), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--force" in err
    again = tmp_path / "m2"
    assert main(["measure", str(folder), "--spots", str(out / "spots.json"),
                 "--out", str(again), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert len(doc["spots"]) == 9
    a = pd.read_csv(out / "spots.csv")
    b = pd.read_csv(again / "spots.csv")
    pd.testing.assert_frame_equal(a, b)


def test_cli_default_out_dir_and_summary(jpeg_card, tmp_path, monkeypatch, capsys):
    folder, _, _ = jpeg_card
    monkeypatch.chdir(tmp_path)
    assert main(["measure", str(folder)]) == 0
    out = capsys.readouterr().out
    assert (tmp_path / f"measure-{folder.name}" / "spots.csv").exists()
    assert "integral" in out.splitlines()[0] and len(out.splitlines()) >= 10


# ------------------------------------------------------------------ bad input


@pytest.fixture(scope="module")
def dark_recording(tmp_path_factory):
    folder = tmp_path_factory.mktemp("dark") / "rec"
    spec = SimulationSpec(size=(48, 64), n_rows=0, n_cols=0, n_frames=6, encoding="png", seed=3)
    simulate_recording(folder, spec)
    return folder


def test_all_dark_recording_warns_and_cli_exits_2(dark_recording, tmp_path, capsys):
    with pytest.warns(NoSpotsWarning, match="no spot found"):
        res = measure(dark_recording)
    assert res.spots_table.empty and list(res.spots_table.columns) == list(SPOTS_COLUMNS)
    assert res.curves_table.empty and list(res.curves_table.columns) == list(CURVES_COLUMNS)
    out = tmp_path / "o"
    assert main(["measure", str(dark_recording), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "warning: no spot found" in err
    assert "error:" in err and err.strip().splitlines()[-1].startswith("error:")
    assert "Traceback" not in err
    assert not out.exists()


def _spot_file(path: Path, spots, **extra) -> Path:
    doc = {"format": "ecl-quant-spots", "version": 1, "spots": spots, **extra}
    path.write_text(json.dumps(doc))
    return path


def test_spots_outside_frame(dark_recording, tmp_path, capsys):
    f = _spot_file(tmp_path / "s.json", [{"number": 1, "shape": "circle", "x": 20, "y": 20,
                                          "radius": 4},
                                         {"number": 2, "shape": "circle", "x": 70, "y": 20,
                                          "radius": 4}])
    with pytest.raises(SpotError, match="spot 2 .* not inside the 64x48 frame") as info:
        measure(dark_recording, spots=f)
    assert info.value.path == str(f)
    out = tmp_path / "o"
    assert main(["measure", str(dark_recording), "--spots", str(f), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(f) in err
    assert not out.exists()


@pytest.mark.parametrize("text", [
    "not json at all",
    json.dumps({"format": "ecl-quant-spots", "version": 1, "spots": [{"shape": "circle",
                                                                       "x": 1, "y": 2}]}),
    json.dumps({"format": "ecl-quant-spots", "version": 1, "spots": [{"shape": "hexagon"}]}),
    json.dumps({"format": "something-else", "version": 1, "spots": []}),
])
def test_malformed_spot_file(dark_recording, tmp_path, capsys, text):
    f = tmp_path / "bad.json"
    f.write_text(text)
    out = tmp_path / "o"
    assert main(["measure", str(dark_recording), "--spots", str(f), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("error: ") and str(f) in err
    assert not out.exists()


def test_given_spots_on_dark_recording_report_no_pulse(dark_recording):
    spot_set = load_spots(_spot_file(
        Path(dark_recording).parent / "one.json",
        [{"number": 1, "shape": "circle", "x": 32, "y": 24, "radius": 5}]))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = measure(dark_recording, spots=spot_set)
    flags = res.spots_table.loc[0, "flags"].split(";")
    assert "no_pulse" in flags
    assert np.isfinite(res.spots_table.loc[0, "integral"])  # a blank's integral is valid


def test_frames_beyond_the_shift_limit_are_flagged(jpeg_card):
    # The simulated tremor reaches 3 px; with a 1 px limit the frames beyond it are
    # marked in curves.csv and every spot carries "drifted".
    folder, truth, res = jpeg_card
    assert not res.curves_table["drifted"].any()
    tight = measure(folder, spots=res.spot_set, settings=MeasureSettings(max_shift_px=1.0))
    per_frame = tight.curves_table[tight.curves_table.spot == 1]["drifted"].to_numpy()
    shifts = tight.curves_table[tight.curves_table.spot == 1][["shift_x_px", "shift_y_px"]]
    assert per_frame.any() and not per_frame.all()
    np.testing.assert_array_equal(per_frame, np.hypot(*shifts.to_numpy().T) > 1.0)
    assert all("drifted" in f.split(";") for f in tight.spots_table["flags"])
    assert tight.provenance["analysis"]["drift"]["frames_drifted"] == int(per_frame.sum())


@pytest.mark.parametrize("card", ["h264_card", "jpeg_card"])
def test_half_resolution_detection_finds_the_same_spots(card, request):
    # Frames of 720 rows or more are detected on a 2x box-averaged projection; forced
    # here on the small cards: the same spots to a fraction of a pixel, and the same
    # integrals to well within their SE.
    path, _, res = request.getfixturevalue(card)
    half = measure(path, settings=MeasureSettings(detect_scale=2))
    assert half.provenance["detection"]["projection_scale"] == 2
    assert half.projection_max.shape == res.projection_max.shape
    np.testing.assert_allclose(half.spots_table["x_px"], res.spots_table["x_px"], atol=0.5)
    np.testing.assert_allclose(half.spots_table["y_px"], res.spots_table["y_px"], atol=0.5)
    diff = np.abs(half.spots_table["integral"] - res.spots_table["integral"])
    assert (diff < res.spots_table["integral_se"]).all()


def test_hot_pixel_at_top_code_inside_an_aperture_is_not_saturation(tmp_path):
    # common practice: a hot pixel (stuck at the top code in every frame, dark frames
    # included) carries no information about the light; it is filled from its neighbours
    # and must not invalidate the spot as "saturated". Truth from the project's simulator.
    from PIL import Image

    folder = tmp_path / "card"
    spec = SimulationSpec(**{**CARD, "n_frames": 60, "drift_px": 0.0, "n_hot_pixels": 0},
                          encoding="png", seed=21)
    truth = simulate_recording(folder, spec)
    clean = measure(folder).spots_table.set_index("spot")
    s1 = truth.spots[0]
    x, y = int(round(s1.x_px)) + 2, int(round(s1.y_px)) - 1
    for f in sorted(folder.glob("*.png")):
        with Image.open(f) as im:
            im.load()
            exif = im.getexif()
            img = im.copy()
        img.putpixel((x, y), (255,) * len(img.getbands()))
        img.save(f, exif=exif)
    hot = measure(folder).spots_table.set_index("spot")
    assert "saturated" not in hot.loc[1, "flags"].split(";")
    assert hot.loc[1, "saturated_frames"] == 0
    assert np.isfinite(hot.loc[1, "integral"])
    # The filled pixel changes the integral by far less than its standard error.
    assert abs(hot.loc[1, "integral"] - clean.loc[1, "integral"]) < clean.loc[1, "integral_se"]


# ------------------------------------------------------------------ key-frame detection


def test_key_frames_are_the_codecs_key_frames(tmp_path):
    # frames(key_only=True) must yield exactly the frames PyAV (reference decoder) flags
    # as key frames in a full decode, with the same times and pixels.
    import av

    from ecl_quant.frames import open_recording

    path = tmp_path / "gop.mp4"
    simulate_recording(path, SimulationSpec(**{**CARD, "n_frames": 60}, encoding="h264",
                                            crf=12, gop_frames=10, seed=21))
    rec = open_recording(path)
    keys = list(rec.frames(key_only=True))
    with av.open(str(path)) as c:
        flags = [f.key_frame for f in c.decode(c.streams.video[0])]
    full = list(rec.frames())
    expected = [fr for fr, k in zip(full, flags) if k]
    assert len(keys) == len(expected) >= 6
    for a, b in zip(keys, expected):
        assert a.time_s == b.time_s
        np.testing.assert_array_equal(a.data, b.data)


@pytest.fixture(scope="module")
def gop_card(tmp_path_factory):
    # A phone-like encode: a key frame every second (10 s, 30 fps).
    path = tmp_path_factory.mktemp("gop") / "card.mp4"
    spec = SimulationSpec(**{**CARD, "n_frames": 300, "onset_s": 2.0}, encoding="h264", crf=10,
                          gop_frames=30, seed=22)
    truth = simulate_recording(path, spec)
    return path, truth


def test_detection_on_key_frames_finds_the_same_spots(gop_card):
    # With key frames at most 1 s apart the detection pass reads only those (auto); the
    # spots, their positions and the integrals must match detection on every frame, and
    # both must match the simulator's truth (row-major, log-log slope 1).
    path, truth = gop_card
    keyed = measure(path)
    every = measure(path, settings=MeasureSettings(detect_frames="all"))
    assert keyed.provenance["detection"]["frames"] == "key"
    # 10 periodic key frames, plus any the encoder adds at a scene change (x264 scenecut).
    assert 10 <= keyed.provenance["detection"]["projection_frames"] <= 30
    assert every.provenance["detection"]["frames"] == "all"
    _check_row_major(truth, keyed)
    a, b = keyed.spots_table, every.spots_table
    # Coordinates are relative to the card at the first frame with structure, which the
    # key frames see a little later on this drifting card: one common offset (< 3.5 px,
    # the drift), then the same layout.
    for col in ("x_px", "y_px"):
        d = a[col].to_numpy() - b[col].to_numpy()
        assert abs(np.median(d)) < 3.5
        np.testing.assert_allclose(d - np.median(d), 0.0, atol=0.5)
    # The aperture radius comes from the projection (14.7 vs 15.4 px here), so integrals
    # move a little, well inside their standard errors (common practice: a method
    # choice should shift results by much less than their uncertainty).
    diff = np.abs(a["integral"].to_numpy() - b["integral"].to_numpy())
    assert np.all(diff < 0.6 * b["integral_se"].to_numpy()), diff / b["integral_se"].to_numpy()
    slope, r2 = _loglog(truth, keyed)
    assert slope == pytest.approx(1.0, abs=0.02) and r2 > 0.999


def test_sparse_key_frames_fall_back_to_every_frame(h264_card):
    # x264's default interval (250 frames) leaves one key frame in 150: too sparse to
    # sample a pulse, so auto detection reads every frame and says why.
    _, _, res = h264_card
    det = res.provenance["detection"]
    assert det["frames"] == "all"
    assert "key frames" in det["key_frames"] and "need >= 8" in det["key_frames"]


@pytest.mark.parametrize("card", ["jpeg_card", "h264_card"])
def test_kept_frames_give_the_results_of_a_second_decode(card, request, monkeypatch):
    # A short recording is decoded once: the detection pass keeps its frames for the
    # integration pass. Reference: the same recording decoded twice (nothing kept) must
    # give the same numbers to the last bit (common practice: a cache changes no result).
    import ecl_quant.measure as measure_module

    source, _, kept = request.getfixturevalue(card)
    assert kept.provenance["detection"]["integration_pass"] == \
        "frames kept from the detection pass"
    monkeypatch.setattr(measure_module, "FRAME_CACHE_MB", 0.5)  # too small: decode again
    again = measure(source)
    assert again.provenance["detection"]["integration_pass"] == "decoded"
    pd.testing.assert_frame_equal(kept.curves_table, again.curves_table, check_exact=True)
    pd.testing.assert_frame_equal(kept.spots_table, again.spots_table, check_exact=True)


def test_kept_frames_are_read_only_and_let_go():
    # A pass that wrote into a kept frame would change what the next pass reads: kept
    # pixels are read-only, and the replay hands each frame over once (common practice).
    from ecl_quant.frames import Frame
    from ecl_quant.measure import _FrameCache

    frames = [Frame(index=i, time_s=i / 10, data=np.full((4, 5), i, np.uint8), max_code=255.0,
                    source="x") for i in range(3)]
    cache = _FrameCache(1.0)
    assert [f.index for f in cache.keep(frames)] == [0, 1, 2]
    assert cache.complete
    with pytest.raises(ValueError):
        frames[1].data[0, 0] = 7
    assert [f.index for f in cache.replay()] == [0, 1, 2]
    assert not cache.complete and list(cache.replay()) == []
    # Over the limit: nothing is kept, every frame still passes through.
    small = _FrameCache(40 / 2**20)
    more = [Frame(index=i, time_s=0.0, data=np.zeros((4, 5), np.uint8), max_code=255.0,
                  source="x") for i in range(3)]
    assert len(list(small.keep(more))) == 3 and not small.complete
    more[2].data[0, 0] = 1  # the frame over the limit was not made read-only
