"""Batch runs: manifest validation, path confinement, cache keys, the output lock, the
execution layer (in-process, process pool, dask LocalCluster), resume after SIGKILL,
partial failures, and the demo scenario end to end against the simulator's truth.

Outside references: hashlib (Python standard library) for SHA-256; flock(2)/kill(2)
semantics (POSIX, common practice); scipy.stats / numpy for the checks on recovered
concentrations; the simulator's exact ground truth for the demo.
"""

from __future__ import annotations

import hashlib
import shutil
import json
import os
import signal
import socket
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from ecl_quant.batch import (
    ManifestError,
    OutputLock,
    confine_path,
    content_digest,
    iter_completed,
    parse_spot_list,
    read_manifest,
    recording_key,
)
from ecl_quant.errors import InputFormatError, OutputError

REPO = Path(__file__).resolve().parents[1]


# ------------------------------------------------------------------ manifest


def _write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
    return path


def _touch(*paths: Path) -> None:
    for p in paths:
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(b"x")


def test_manifest_reports_every_problem_at_once(tmp_path):
    _touch(tmp_path / "a.mp4", tmp_path / "rec" / "f1.jpg")
    m = _write(tmp_path / "m.csv", """
        path,sample,role,concentration,spot,channel,transfer
        a.mp4,S0,standard,0,1-3,,
        a.mp4,S1,standard,1,4;5,,
        a.mp4,S1,standard,2,5,,
        rec,U1,unknown,3,,purple,
        ../outside.mp4,B,blank,,,,
        missing.mp4,X,reference,abc,0,,gamma=42
        a.mp4,,blank,1,,,
    """)
    with pytest.raises(ManifestError) as info:
        read_manifest(m)
    problems = info.value.problems
    text = "\n".join(problems)
    # One exception lists every problem, each with its line number (common practice for
    # input validation: fix everything in one go).
    expected = [
        ("line 5", "an unknown has no concentration"),
        ("line 5", "channel 'purple'"),
        ("line 6", "outside the manifest's folder"),
        ("line 7", "not found"),
        ("line 7", "role 'reference'"),
        ("line 7", "'abc' is not a number"),
        ("line 7", "spot numbers start at 1"),
        ("line 7", "gamma=42"),
        ("line 8", "sample is empty"),
        ("line 8", "a blank has concentration 0"),
        ("lines 3, 4", "standard 'S1' has concentrations 1, 2"),
        ("lines 3, 4", "spot 5 of recording 'a.mp4' is assigned twice"),
    ]
    for line, what in expected:
        assert any(p.startswith(line) and what in p for p in problems), (line, what, text)
    assert len(problems) == len(expected), text
    assert str(info.value).count("\n  - ") == len(problems)
    assert info.value.path == str(m)


def test_manifest_structure_problems(tmp_path):
    _touch(tmp_path / "a.mp4")
    m = _write(tmp_path / "m.csv", "file,sample,kind\na.mp4,S,standard\n")
    with pytest.raises(ManifestError) as info:
        read_manifest(m)
    text = str(info.value)
    assert "unknown column(s) 'file', 'kind'" in text
    assert "required column(s) path, role missing" in text
    with pytest.raises(ManifestError, match="empty"):
        read_manifest(_write(tmp_path / "e.csv", "# only a comment\n"))
    with pytest.raises(InputFormatError, match="not found"):
        read_manifest(tmp_path / "nope.csv")


def test_manifest_needs_two_standard_levels_and_consistent_rows(tmp_path):
    _touch(tmp_path / "a.mp4", tmp_path / "b.mp4", tmp_path / "d1", tmp_path / "d2")
    m = _write(tmp_path / "m.csv", """
        path,sample,role,concentration,spot,dark
        a.mp4,S5,standard,5,1,d1
        a.mp4,S5b,standard,5,2,d2
        b.mp4,U,unknown,,,
        b.mp4,U,unknown,,3,
        b.mp4,B,standard,,4,
    """)
    with pytest.raises(ManifestError) as info:
        read_manifest(m)
    text = str(info.value)
    assert "a standard needs its concentration" in text
    assert "standards at 1 concentration" in text
    assert "different dark values" in text
    assert "leaves spot empty" in text


def test_manifest_good_rows(tmp_path):
    _touch(tmp_path / "cards" / "c1" / "f.jpg", tmp_path / "v.mp4", tmp_path / "darks" / "d.jpg",
           tmp_path / "prof.json")
    m = _write(tmp_path / "m.csv", """
        # comment lines and blank lines are skipped
        Path,Sample,Role,Concentration,Spot,Dark,Spots_File,Channel,Transfer,Notes
        cards/c1,std-0,standard,0,1-3,darks,,Red,,
        cards/c1,std-10,standard,10,4;5;6,darks,,red,,
        cards/c1,blank,blank,,7-8,darks,,red,,

        v.mp4,pond-1,unknown,,,,,,profile=prof.json,"inlet, morning"
    """)
    man = read_manifest(m)
    assert [r.line for r in man.rows] == [3, 4, 5, 7]
    assert [r.spots for r in man.rows] == [(1, 2, 3), (4, 5, 6), (7, 8), None]
    assert man.rows[2].concentration == 0.0 and man.rows[3].concentration is None
    assert man.rows[0].dark == (tmp_path / "darks").resolve()
    assert man.rows[3].transfer == f"profile={(tmp_path / 'prof.json').resolve()}"
    assert man.rows[3].notes == "inlet, morning"
    assert [r.rec_id for r in man.recordings] == ["cards_c1", "v.mp4"]
    assert man.recordings[0].lines == (3, 4, 5)
    assert man.recordings[0].channel == "red"
    assert len(man.to_frame()) == 4


def test_manifest_checks_spot_numbers_against_the_spots_file(tmp_path):
    from ecl_quant.spots import SpotSet, make_spot, save_spots

    _touch(tmp_path / "card.mp4")
    save_spots(SpotSet(tuple(make_spot(k, "circle", (10.0 * k, 10.0, 4.0))
                             for k in (1, 2, 3))), tmp_path / "layout.json")
    (tmp_path / "broken.json").write_text("{not json")
    m = _write(tmp_path / "m.csv", """
        path,sample,role,concentration,spot,spots
        card.mp4,A,standard,1,1-2,layout.json
        card.mp4,B,standard,2,3;4,layout.json
        card.mp4,C,standard,3,5,layout.json
    """)
    with pytest.raises(ManifestError) as info:
        read_manifest(m)
    assert len(info.value.problems) == 2
    assert "line 3: spot(s) 4 not in the spots file layout.json (it has 1;2;3)" in str(info.value)
    assert "line 4: spot(s) 5 not in" in str(info.value)
    m2 = _write(tmp_path / "m2.csv", """
        path,sample,role,concentration,spots
        card.mp4,A,standard,1,broken.json
        card.mp4,A,standard,1,broken.json
    """)
    with pytest.raises(ManifestError, match="broken.json") as info:
        read_manifest(m2)


def test_parse_spot_list():
    assert parse_spot_list("") is None
    assert parse_spot_list(" 3 ") == (3,)
    assert parse_spot_list("1-3;7") == (1, 2, 3, 7)
    assert parse_spot_list("2, 4 | 6") == (2, 4, 6)
    for bad in ("0", "3-1", "a", "1;1", "1-"):
        with pytest.raises(ValueError):
            parse_spot_list(bad)


def test_paths_are_confined_to_the_manifest_folder(tmp_path):
    root = tmp_path / "study"
    (root / "in").mkdir(parents=True)
    outside = tmp_path / "elsewhere.mp4"
    outside.write_bytes(b"x")
    (tmp_path / "other.mp4").write_bytes(b"y")
    (root / "link.mp4").symlink_to(outside)
    assert confine_path("in", root) == (root / "in").resolve()
    for text in ("../elsewhere.mp4", str(outside), "link.mp4", "in/../../elsewhere.mp4"):
        with pytest.raises(InputFormatError, match="--allow-outside"):
            confine_path(text, root)
        assert confine_path(text, root, allow_outside=True) == outside.resolve()
    m = _write(root / "m.csv", """
        path,sample,role,concentration
        link.mp4,A,standard,1
        ../other.mp4,B,standard,2
    """)
    with pytest.raises(ManifestError) as info:
        read_manifest(m)
    assert len(info.value.problems) == 2
    assert len(read_manifest(m, allow_outside=True).recordings) == 2


# ------------------------------------------------------------------ cache keys


def test_content_digest_is_sha256(tmp_path):
    data = b"ecl" * 1000
    f = tmp_path / "f.bin"
    f.write_bytes(data)
    # hashlib (standard library) is the reference for SHA-256 (FIPS 180-4).
    assert content_digest(f) == hashlib.sha256(data).hexdigest()
    d = tmp_path / "burst"
    d.mkdir()
    (d / "b.jpg").write_bytes(b"2")
    (d / "a.jpg").write_bytes(b"1")
    (d / ".hidden").write_bytes(b"ignored")
    expected = hashlib.sha256(
        b"a.jpg\0" + hashlib.sha256(b"1").hexdigest().encode() + b"\n"
        + b"b.jpg\0" + hashlib.sha256(b"2").hexdigest().encode() + b"\n").hexdigest()
    assert content_digest(d) == expected


def test_recording_key_tracks_content_and_parameters(tmp_path):
    f = tmp_path / "r.mp4"
    f.write_bytes(b"frames")
    dark = tmp_path / "dark"
    dark.write_bytes(b"dark")
    k = recording_key(f, parameters={"channel": "red"}, extra_files={"dark": dark})
    assert k == recording_key(f, parameters={"channel": "red"}, extra_files={"dark": dark})
    assert len(k) == 64
    assert k != recording_key(f, parameters={"channel": "green"}, extra_files={"dark": dark})
    assert k != recording_key(f, parameters={"channel": "red"}, extra_files={"dark": None})
    dark.write_bytes(b"dark2")
    assert k != recording_key(f, parameters={"channel": "red"}, extra_files={"dark": dark})
    dark.write_bytes(b"dark")
    f.write_bytes(b"frames!")
    assert k != recording_key(f, parameters={"channel": "red"}, extra_files={"dark": dark})


# ------------------------------------------------------------------ lock


def _holder_script(folder: Path) -> str:
    return (f"import sys, time\nfrom ecl_quant.batch import OutputLock\n"
            f"lock = OutputLock({str(folder)!r}).acquire()\nprint('locked', flush=True)\n"
            "time.sleep(60)\n")


def test_lock_refuses_a_second_batch_and_recovers_after_sigkill(tmp_path):
    first = OutputLock(tmp_path).acquire()
    with pytest.raises(OutputError, match=f"pid {os.getpid()}"):
        OutputLock(tmp_path).acquire()
    first.release()
    assert not (tmp_path / ".ecl-quant.lock").exists()

    proc = subprocess.Popen([sys.executable, "-c", _holder_script(tmp_path)],
                            stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "locked"
        with pytest.raises(OutputError, match="another batch") as info:
            OutputLock(tmp_path).acquire()
        assert f"pid {proc.pid}" in str(info.value)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
    # The holder died without cleaning up: the lock file is still there but stale.
    assert (tmp_path / ".ecl-quant.lock").exists()
    with OutputLock(tmp_path) as lock:
        assert lock.held and lock.took_over["pid"] == proc.pid
    assert not (tmp_path / ".ecl-quant.lock").exists()


def test_lock_respects_a_live_pid_and_takes_over_a_dead_one(tmp_path):
    host = socket.gethostname()
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        # flock is free but the file names a live process on this host: refuse.
        (tmp_path / ".ecl-quant.lock").write_text(json.dumps({"pid": sleeper.pid, "host": host}))
        with pytest.raises(OutputError, match=f"pid {sleeper.pid}"):
            OutputLock(tmp_path).acquire()
    finally:
        sleeper.kill()
        sleeper.wait()
    # Same pid, now dead (kill(2) reports ESRCH): stale, taken over.
    with OutputLock(tmp_path) as lock:
        assert lock.took_over["pid"] == sleeper.pid


# ------------------------------------------------------------------ execution layer


def _patient_dask():
    """Longer dask connect timeouts: the test machine may be loaded (2 shared cores)."""
    import dask

    return dask.config.set({"distributed.comm.timeouts.connect": "120s",
                            "distributed.comm.timeouts.tcp": "120s"})


def _square_or_fail(x: int) -> int:
    if x == 3:
        raise ValueError("three is refused")
    return x * x


def _collect(**kw):
    out = {}
    for i, res, err in iter_completed(_square_or_fail, list(range(6)), **kw):
        out[i] = ("err", str(err)) if err is not None else ("ok", res)
    return out


def test_execution_layers_agree():
    from distributed import LocalCluster

    expected = {i: ("ok", i * i) for i in range(6)}
    expected[3] = ("err", "three is refused")
    assert _collect(workers=1) == expected
    assert _collect(workers=2) == expected
    with _patient_dask(), LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                       dashboard_address=None) as cluster:
        assert _collect(dask=cluster.scheduler_address) == expected
    assert list(iter_completed(_square_or_fail, [], workers=2)) == []


# ------------------------------------------------------------------ field QC pieces


def _disk(radius_px: float, edge_px: float, *, size: int = 120, amp: float = 0.2):
    import numpy as np

    from ecl_quant.simulate import spot_profile

    yy, xx = np.mgrid[0:size, 0:size]
    c = size / 2 + 0.3
    rho = np.hypot(xx - c, yy - c)
    return 0.05 + amp * spot_profile(rho, radius_px=radius_px, edge_px=edge_px), (c, c)


@pytest.mark.parametrize("radius_px", [6.0, 13.0])
def test_spot_sharpness_follows_the_simulated_edge(radius_px):
    import numpy as np

    from ecl_quant.batch import QCLimits, spot_sharpness

    # Ground truth: the simulator's logistic spot edge of known scale (ecl_quant.simulate).
    rng = np.random.default_rng(3)
    edges = [0.35, 0.45, 0.8, 1.5, 2.2]
    scores = []
    for edge in edges:
        img, (x, y) = _disk(radius_px, edge)
        clean = spot_sharpness(img, [(x, y, 1.5 * radius_px)])
        noisy = spot_sharpness(img + rng.normal(0, 0.002, img.shape), [(x, y, 1.5 * radius_px)])
        hot = img.copy()
        hot[int(y), int(x + radius_px + 5)] += 0.6  # a hot pixel beside the spot
        hot[int(y - radius_px + 2), int(x)] += 0.6  # and one on its edge
        assert noisy == pytest.approx(clean, rel=0.1)
        # The 3x3 median removes the hot pixels; on a steep edge it shifts the
        # neighbours' medians by one rank, so the score moves a little, never the verdict.
        with_hot = spot_sharpness(hot, [(x, y, radius_px)])
        assert with_hot == pytest.approx(clean, rel=0.15)
        assert (with_hot < QCLimits().blur_limit) == (clean < QCLimits().blur_limit)
        scores.append(clean)
    assert all(a > b for a, b in zip(scores, scores[1:]))  # softer edge, lower score
    limit = QCLimits().blur_limit
    assert min(scores[:3]) > limit > max(scores[3:])
    # A faint sharp spot (contrast 5 noise SDs) is never called blurred; one too faint
    # to judge (2 SDs) gets no score rather than a false flag.
    for _ in range(5):
        faint, (x, y) = _disk(radius_px, 0.35, amp=0.01)
        score = spot_sharpness(faint + rng.normal(0, 0.002, faint.shape), [(x, y, radius_px)])
        assert np.isnan(score) or score > limit
        fainter, (x, y) = _disk(radius_px, 0.35, amp=0.004)
        assert np.isnan(spot_sharpness(fainter + rng.normal(0, 0.002, fainter.shape),
                                       [(x, y, radius_px)]))


def test_recording_flags_against_limits():
    from ecl_quant.batch import QCLimits, recording_flags

    lim = QCLimits()
    calm = {"max_drift_px": 0.5, "ambient_fraction": 0.04, "blur_score": 0.03,
            "exposure_changed": False}
    assert recording_flags(calm, lim) == []
    rough = {"max_drift_px": 4.0, "ambient_fraction": 0.3, "blur_score": 0.004,
             "exposure_changed": True}
    assert recording_flags(rough, lim) == ["drifted", "exposure_changed", "ambient_light",
                                           "blurred"]
    assert recording_flags({"blur_score": None}, lim) == []  # unknown is not a flag


# ------------------------------------------------------------------ end to end

import pandas as pd  # noqa: E402

from ecl_quant.batch import BatchSettings, run_batch  # noqa: E402
from ecl_quant.cli import main  # noqa: E402
from ecl_quant.simulate import SimulationSpec, simulate_recording  # noqa: E402

# Tiny simulated cards: 96x72 px, 3 spots, 25 frames (fast); response linear in c.
_GOOD = [  # (path, sample, role, concentration, true concentration, encoding)
    ("s0", "S0", "standard", 0.0, 0.0, "jpeg"),
    ("s2", "S2", "standard", 2.0, 2.0, "jpeg"),
    ("s5", "S5", "standard", 5.0, 5.0, "jpeg"),
    ("s10", "S10", "standard", 10.0, 10.0, "jpeg"),
    ("s20", "S20", "standard", 20.0, 20.0, "jpeg"),
    ("blank", "B", "blank", None, 0.0, "jpeg"),
    ("u1.mp4", "U1", "unknown", None, 3.0, "h264"),
    ("u2", "U2", "unknown", None, 12.0, "jpeg"),
]
_OUTPUTS = ("measurements.csv", "results.csv", "qc.csv", "errors.csv")


def _tiny(path: Path, conc: float, seed: int, encoding: str, **flaws) -> None:
    # 25 frames at 8 fps: the pulse (peak at ~0.8 s) has decayed to ~3 % of its peak by
    # the last frame (not flagged pulse_not_ended).
    amp = 0.01 + 0.02 * conc
    opts = {"size": (72, 96), **flaws}
    spec = SimulationSpec(n_rows=1, n_cols=3, radius_px=6.0, spacing_px=24.0,
                          amplitudes=(amp, amp, amp), n_frames=25, fps=8.0, onset_s=0.4,
                          rise_s=0.3, decay_s=0.6, drift_px=0.3, n_hot_pixels=1,
                          encoding=encoding, crf=12, seed=seed, **opts)
    simulate_recording(path, spec)


def _manifest(rows, path: Path) -> Path:
    # Video frames carry no exposure time; the simulator's is 1/30 s (its default).
    lines = ["path,sample,role,concentration,exposure_s"]
    for p, sample, role, conc, *_ in rows:
        lines.append(f"{p},{sample},{role},{'' if conc is None else f'{conc:g}'},"
                     f"{'1/30' if p.endswith('.mp4') else ''}")
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("study")
    for k, (p, _s, _r, _c, true, enc) in enumerate(_GOOD):
        _tiny(root / p, true, 500 + k, enc)
    # Two corrupt recordings: a video cut short before its index, a burst with a
    # damaged frame.
    _tiny(root / "cut.mp4", 5.0, 598, "h264")
    data = (root / "cut.mp4").read_bytes()
    (root / "cut.mp4").write_bytes(data[: len(data) // 3])
    _tiny(root / "damaged", 5.0, 599, "jpeg")
    frames = sorted((root / "damaged").iterdir())
    frames[10].write_bytes(frames[10].read_bytes()[:200])
    good = _manifest(_GOOD, root / "good.csv")
    bad = [("cut.mp4", "S5", "standard", 5.0), ("damaged", "U3", "unknown", None)]
    partial = _manifest([*_GOOD[:3], bad[0], *_GOOD[3:], bad[1]], root / "partial.csv")
    return {"root": root, "good": good, "partial": partial}


@pytest.fixture(scope="module")
def clean_run(study, tmp_path_factory):
    """One uninterrupted in-process run (--workers 1) on the good manifest."""
    out = tmp_path_factory.mktemp("clean") / "out"
    res = run_batch(study["good"], BatchSettings(out_dir=out, workers=1, progress=False))
    assert res.exit_code == 0, res.errors
    return out


def _calibration_doc(out: Path) -> dict:
    doc = json.loads((out / "calibration.json").read_text())
    doc.pop("provenance", None)  # holds the date of the fit
    doc.pop("sha256", None)  # hash over the content including provenance
    return doc


def _same_outputs(a: Path, b: Path) -> None:
    for name in _OUTPUTS:
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    assert _calibration_doc(a) == _calibration_doc(b)


def _statuses(out: Path) -> dict[str, str]:
    doc = json.loads((out / "batch.json").read_text())
    return {r["rec_id"]: r["status"] for r in doc["recordings"]}


def test_partial_batch_finishes_the_rest(study, tmp_path, capsys):
    out = tmp_path / "out"
    rc = main(["batch", str(study["partial"]), "--out", str(out), "--workers", "2"])
    captured = capsys.readouterr()
    assert rc == 1
    assert "partial: 2 of 10 recording(s) failed" in captured.err
    errors = pd.read_csv(out / "errors.csv")
    assert sorted(errors["path"]) == ["cut.mp4", "damaged"]
    assert set(errors["stage"]) == {"measure"}
    assert all(isinstance(m, str) and m for m in errors["message"])
    statuses = _statuses(out)
    assert sum(s == "measured" for s in statuses.values()) == 8
    results = pd.read_csv(out / "results.csv")
    assert list(results["sample"]) == ["U1", "U2"]  # U3 lived only on the damaged burst
    assert results["concentration"].notna().all()
    meas = pd.read_csv(out / "measurements.csv")
    assert set(meas["recording"]) == {p for p, *_ in _GOOD}
    assert (out / "report.html").is_file() and (out / "calibration.json").is_file()
    # The summary on stdout names both failures and the results.
    assert "cut.mp4" in captured.out and "damaged" in captured.out and "U2" in captured.out


def test_same_results_from_one_two_workers_and_dask(study, clean_run, tmp_path):
    from distributed import Client, LocalCluster

    outs = {"w1": clean_run, "w2": tmp_path / "w2"}
    res = run_batch(study["good"], BatchSettings(out_dir=outs["w2"], workers=2, progress=False))
    assert res.exit_code == 0
    outs["dask"] = tmp_path / "dask"
    with _patient_dask(), LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=None) as cluster, \
            Client(cluster) as client:
        res = run_batch(study["good"], BatchSettings(out_dir=outs["dask"], progress=False),
                        client=client)
    assert res.exit_code == 0
    assert set(_statuses(outs["dask"]).values()) == {"measured"}
    _same_outputs(outs["w1"], outs["w2"])
    _same_outputs(outs["w1"], outs["dask"])


def test_sigkill_midway_then_resume(study, clean_run, tmp_path):
    clean = clean_run
    out = tmp_path / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "ecl_quant", "batch", str(study["good"]),
                             "--out", str(out), "--workers", "1", "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    done: list[Path] = []
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            done = sorted((out / "recordings").glob("*/done.json"))
            if len(done) >= 3:
                proc.send_signal(signal.SIGKILL)
                break
            time.sleep(0.005)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL, "the batch ended before it could be killed"
    finished = {p.parent.name: (p.read_bytes(), p.stat().st_mtime_ns)
                for p in (out / "recordings").glob("*/done.json")}
    assert 3 <= len(finished) < len(_GOOD)
    assert (out / ".ecl-quant.lock").exists()  # left behind by the killed batch
    assert not (out / "results.csv").exists()

    rc = main(["batch", str(study["good"]), "--out", str(out), "--workers", "1", "--quiet"])
    assert rc == 0
    statuses = _statuses(out)
    for rec_id, (content, mtime) in finished.items():
        assert statuses[rec_id] == "cached"
        p = out / "recordings" / rec_id / "done.json"
        assert p.read_bytes() == content and p.stat().st_mtime_ns == mtime
    assert sum(s == "measured" for s in statuses.values()) == len(_GOOD) - len(finished)
    assert not list((out / "recordings").glob(".*"))  # no partial folders left
    _same_outputs(clean, out)
    # A third run measures nothing.
    assert main(["batch", str(study["good"]), "--out", str(out), "--quiet"]) == 0
    assert set(_statuses(out).values()) == {"cached"}


def test_cache_follows_content_and_parameters(study, tmp_path):
    root = tmp_path / "copy"
    keep = ("s0", "s5", "s20", "u2")
    root.mkdir()
    for name in keep:
        shutil.copytree(study["root"] / name, root / name)
    _manifest([g for g in _GOOD if g[0] in keep], root / "good.csv")
    out = tmp_path / "out"
    settings = BatchSettings(out_dir=out, workers=1, progress=False)
    assert run_batch(root / "good.csv", settings).exit_code == 0
    # Change one frame of one burst: only that recording is measured again.
    frame = sorted((root / "s5").iterdir())[0]
    frame.write_bytes(frame.read_bytes() + b"\0")
    run_batch(root / "good.csv", settings)
    st = _statuses(out)
    assert st.pop("s5") == "measured" and set(st.values()) == {"cached"}
    # --response changes only the calibration, not the measurement.
    run_batch(root / "good.csv", BatchSettings(out_dir=out, workers=1, progress=False,
                                               response="peak"))
    assert set(_statuses(out).values()) == {"cached"}
    # Another channel changes every measurement.
    run_batch(root / "good.csv", BatchSettings(out_dir=out, workers=1, progress=False,
                                               channel="green"))
    assert set(_statuses(out).values()) == {"measured"}
    # --force measures everything again.
    run_batch(root / "good.csv", BatchSettings(out_dir=out, workers=1, progress=False,
                                               channel="green", force=True))
    assert set(_statuses(out).values()) == {"measured"}


def test_second_batch_on_the_same_folder_is_refused(study, tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    with OutputLock(out):
        rc = main(["batch", str(study["good"]), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.startswith("error: ") and "another batch" in err and f"pid {os.getpid()}" in err
    assert len(err.strip().splitlines()) == 1
    assert not (out / "recordings").exists() or not any((out / "recordings").iterdir())


def test_bad_manifest_stops_before_any_work(study, tmp_path, capsys):
    m = tmp_path / "m.csv"
    m.write_text("path,sample,role,concentration\nnope.mp4,A,standard,1\nx,B,unknwn,\n")
    out = tmp_path / "out"
    assert main(["batch", str(m), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "3 problems in the manifest" in err
    assert "line 2: recording 'nope.mp4' not found" in err
    assert "line 3: recording 'x' not found" in err and "line 3: role 'unknwn'" in err
    assert not out.exists()


def test_foreign_output_folder_needs_force(study, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "thesis.docx").write_bytes(b"x")
    with pytest.raises(OutputError, match="not from a batch"):
        run_batch(study["good"], BatchSettings(out_dir=out, workers=1, progress=False))
    assert (out / "thesis.docx").exists()


def test_field_qc_flags(tmp_path):
    # Each flaw is made by the simulator with a known cause (ground truth), one per card.
    root = tmp_path / "field"
    root.mkdir()
    cards = [("s0", "S0", "standard", 0.0, 0.0, {}),
             ("s10", "S10", "standard", 10.0, 10.0, {}),
             ("s20", "S20", "standard", 20.0, 20.0, {}),
             ("sharp", "SHARP", "unknown", None, 10.0, {}),
             ("defocused", "BLUR", "unknown", None, 10.0, {"edge_px": 2.2, "size": (112, 192)}),
             ("autoexp", "AE", "unknown", None, 10.0, {"exposure_change": (12, 1 / 60)}),
             ("roomlight", "AMB", "unknown", None, 10.0, {"ambient_fs": 0.4}),
             ("empty", "ZERO", "unknown", None, 0.0, {}),
             ("strong", "HIGH", "unknown", None, 30.0, {})]
    for k, (p, *_rest, true, flaws) in enumerate(cards):
        _tiny(root / p, true, 700 + k, "jpeg", **flaws)
    m = _manifest([c[:4] for c in cards], root / "m.csv")
    res = run_batch(m, BatchSettings(out_dir=tmp_path / "out", workers=2, progress=False))
    assert res.exit_code == 0, res.errors
    qc = res.qc.set_index("recording")
    flags = {r: set(str(f).split(";")) - {"", "nan"} for r, f in qc["flags"].items()}
    assert "blurred" in flags["defocused"] and "blurred" not in flags["sharp"]
    assert qc.loc["defocused", "blur_score"] < 0.010 < qc.loc["sharp", "blur_score"]
    assert "exposure_changed" in flags["autoexp"]
    assert "ambient_light" in flags["roomlight"]
    assert qc.loc["roomlight", "ambient_fraction"] > 0.1 > qc.loc["sharp", "ambient_fraction"]
    assert "below_lod" in flags["empty"] and "above_range" in flags["strong"]
    assert flags["sharp"] == set()
    results = res.results.set_index("sample")
    assert "below_lod" in results.loc["ZERO", "flags"]
    assert "above_range" in results.loc["HIGH", "flags"]
    assert "blurred" in results.loc["BLUR", "flags"]
    # Every flag written is explained in the report's glossary.
    from ecl_quant.batch import QC_FLAGS, RESULT_FLAGS

    for words in flags.values():
        assert words <= set(QC_FLAGS) | set(RESULT_FLAGS)


# ------------------------------------------------------------------ the demo


def test_demo_recovers_the_simulated_truth(tmp_path):
    manifest = REPO / "sample_frames" / "manifest.csv"
    truth = json.loads((REPO / "sample_frames" / "truth.json").read_text())
    out = tmp_path / "demo"
    res = run_batch(manifest, BatchSettings(out_dir=out, workers=2, progress=False))
    assert res.exit_code == 0, res.errors
    results = pd.read_csv(out / "results.csv").set_index("sample")
    assert set(results.index) == set(truth["unknowns"])
    for sample, true_c in truth["unknowns"].items():
        r = results.loc[sample]
        # Every unknown's true (simulated) concentration lies inside its 95 % interval.
        assert r["ci_low"] <= true_c <= r["ci_high"], (sample, true_c, dict(r))
    cal = json.loads((out / "calibration.json").read_text())
    assert cal["model"]["name"] == "linear"
    slope = cal["parameters"]["slope"]
    true_slope = truth["calibration_truth"]["slope"]
    assert abs(slope / true_slope - 1) < 0.05, (slope, true_slope)
    # The flawed field recording carries its flags; its overexposed spot is left out.
    qc = pd.read_csv(out / "qc.csv").set_index("recording")
    flags = set(qc.loc["card-G", "flags"].split(";"))
    assert {"saturated", "drifted", "ambient_light"} <= flags
    for clean in ("card-A", "card-B", "card-E.mp4"):
        assert not ({"saturated", "drifted", "ambient_light"} & set(
            str(qc.loc[clean, "flags"]).split(";")))
    meas = pd.read_csv(out / "measurements.csv")
    g8 = meas[(meas["recording"] == "card-G") & (meas["spot"] == 8)].iloc[0]
    assert not g8["used"] and "saturated" in g8["flags"]


def test_simulate_keeps_foreign_files(tmp_path, capsys):
    from ecl_quant.scenario import is_scenario_folder

    (tmp_path / "manifest.csv").write_text("path,sample,role\n")  # someone else's manifest
    assert not is_scenario_folder(tmp_path)
    assert main(["simulate", "--out", str(tmp_path), "--seed", "5"]) == 2
    assert "--force" in capsys.readouterr().err
    assert (tmp_path / "manifest.csv").read_text() == "path,sample,role\n"
    assert is_scenario_folder(REPO / "sample_frames")  # the shipped demo is remade freely


@pytest.fixture(scope="module")
def camera_json(tmp_path_factory):
    # A camera.json from the project's EMVA 1288 analysis of a simulated sensor (known
    # gain 0.45 DN/e-, read noise 2.8 e-: simulated ground truth, EMVA 1288 R4.0 Eq. 15).
    from _media import write_simulated_camera_json

    return write_simulated_camera_json(tmp_path_factory.mktemp("cam"), shape=(64, 64))[0]


def test_manifest_noise_from_column(study, camera_json, tmp_path):
    # A row's noise_from camera.json replaces that recording's estimated noise model,
    # exactly as measure --noise-from does (radiometry.camera_noise_model); the other
    # recordings keep their own estimate; a damaged camera.json is a manifest problem.
    from ecl_quant.batch import read_manifest
    from ecl_quant.radiometry import camera_noise_model

    root = tmp_path / "copy"
    root.mkdir()
    keep = [g for g in _GOOD if g[0] in ("s0", "s5", "s20", "u2")]
    for g in keep:
        shutil.copytree(study["root"] / g[0], root / g[0])
    shutil.copy(camera_json, root / "camera.json")
    lines = ["path,sample,role,concentration,noise_from"]
    for p, sample, role, conc, *_ in keep:
        lines.append(f"{p},{sample},{role},{'' if conc is None else f'{conc:g}'},"
                     f"{'camera.json' if p == 's5' else ''}")
    (root / "m.csv").write_text("\n".join(lines) + "\n")
    out = tmp_path / "out"
    assert run_batch(root / "m.csv", BatchSettings(out_dir=out, workers=1,
                                                   progress=False)).exit_code == 0
    read_var, gain, source = camera_noise_model(root / "camera.json")
    given = json.loads((out / "recordings" / "s5" / "run.json").read_text())
    noise = given["analysis"]["noise_model"]
    assert noise["read_var"] == pytest.approx(read_var, rel=1e-12)
    assert noise["gain_e_per_fs"] == pytest.approx(gain, rel=1e-12)
    assert noise["source"] == source
    other = json.loads((out / "recordings" / "s0" / "run.json").read_text())
    assert other["analysis"]["noise_model"]["source"] != source
    # A damaged camera.json stops the batch before any work, naming the line.
    (root / "camera.json").write_text("{}")
    with pytest.raises(InputFormatError, match=r"line 3.*noise_from"):
        read_manifest(root / "m.csv")
