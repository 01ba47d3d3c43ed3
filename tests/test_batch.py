"""Batch runs: manifest validation, path confinement, cache keys, the output lock, the
execution layer (in-process, process pool, dask LocalCluster), resume after SIGKILL,
partial failures, and the demo scenario end to end against the simulator's truth.

Outside references: hashlib (Python standard library) for SHA-256; flock(2)/kill(2)
semantics (POSIX, common practice); scipy.stats / numpy for the checks on recovered
concentrations; the simulator's exact ground truth for the demo.
"""

from __future__ import annotations

import hashlib
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
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                      dashboard_address=None) as cluster:
        assert _collect(dask=cluster.scheduler_address) == expected
    assert list(iter_completed(_square_or_fail, [], workers=2)) == []
