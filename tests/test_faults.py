"""Killed jobs and concurrent runs: no corrupt output, and the rerun completes.

A job is killed with SIGKILL (no cleanup handler runs, as when a phone's battery or a
cluster's scheduler ends it) at a chosen point: the child process pauses inside a file
rename or a recording's measurement, announces it on stdout, and the test kills it there.
Outside references: kill(2)/SIGKILL and rename(2) atomicity (POSIX.1-2017); flock(2) locks
are released by the kernel when their holder dies (Linux man-pages).

The batch helper's tests cover resume after SIGKILL and the lock at the API level; these
cover measure, and two real batch processes on one folder from the command line.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from ecl_quant.cli import main

REPO = Path(__file__).resolve().parents[1]

_PAUSE_AT_RENAME = """
import os, sys, time
out = os.path.realpath(sys.argv[1])
stop_at = int(sys.argv[2])
real = os.replace
count = [0]
def replace(src, dst, *a, **k):
    final = os.path.realpath(os.fspath(dst))
    if final.startswith(out + os.sep) and not os.path.basename(final).startswith("."):
        count[0] += 1
        if count[0] == stop_at:
            print("PAUSED", os.path.basename(os.fspath(dst)), flush=True)
            time.sleep(600)
    return real(src, dst, *a, **k)
os.replace = replace
from ecl_quant.cli import main
sys.exit(main(sys.argv[3:]))
"""

_PAUSE_IN_BATCH = """
import sys, time
import ecl_quant.batch as batch
real = batch._measure_recording
count = [0]
def slow(job, *args):
    count[0] += 1
    if count[0] == int(sys.argv[1]):
        print("PAUSED", job.rec_id, flush=True)
        time.sleep(600)
    return real(job, *args)
batch._measure_recording = slow
from ecl_quant.cli import main
sys.exit(main(sys.argv[2:]))
"""


def _spawn(script: str, *args: str) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(script), *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def _kill_when_paused(proc: subprocess.Popen) -> str:
    try:
        line = proc.stdout.readline()
        assert line.startswith("PAUSED"), (line, proc.stderr.read() if proc.poll() else "")
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    return line.split(maxsplit=1)[1].strip()


def _complete(path: Path) -> None:
    """Raise unless ``path`` is a whole, parseable file of its kind."""
    import pandas as pd
    from PIL import Image

    if path.suffix == ".csv":
        df = pd.read_csv(path)
        assert len(df.columns) > 1
    elif path.suffix == ".json":
        json.loads(path.read_text(encoding="utf-8"))
    elif path.suffix == ".png":
        with Image.open(path) as im:
            im.verify()
    else:  # pragma: no cover - a new output kind: add its check
        raise AssertionError(f"unknown output {path.name}")


@pytest.fixture(scope="module")
def card(tmp_path_factory):
    """A tiny simulated card (PNG stills, two spots), the simulator's known truth."""
    from ecl_quant.simulate import SimulationSpec, simulate_recording

    root = tmp_path_factory.mktemp("card")
    spec = SimulationSpec(size=(48, 64), n_rows=1, n_cols=2, radius_px=5.0, spacing_px=24.0,
                          amplitudes=(0.3, 0.3), n_frames=12, fps=8.0, onset_s=0.3,
                          rise_s=0.2, decay_s=0.5, encoding="png", seed=1)
    simulate_recording(root / "card", spec)
    return root / "card"


# ------------------------------------------------------------------ measure


@pytest.mark.parametrize("stop_at", [1, 3, 6])
def test_sigkill_during_measure_outputs(card, tmp_path, stop_at, capsys):
    from ecl_quant.measure import OUTPUT_FILES

    out = tmp_path / "out"
    argv = ["measure", str(card), "--out", str(out), "--quiet"]
    name = _kill_when_paused(_spawn(_PAUSE_AT_RENAME, str(out), str(stop_at), *argv))
    assert name in OUTPUT_FILES
    visible = sorted(p.name for p in out.iterdir() if not p.name.startswith("."))
    # Renames are atomic: only files renamed before the kill are there, each one whole.
    assert len(visible) == stop_at - 1, visible
    assert (out / ".ecl-quant-writing").is_file()  # the writer's "unfinished" marker
    assert set(visible) <= set(OUTPUT_FILES)
    for v in visible:
        _complete(out / v)
    # The same command again (no --force: nothing of a finished run is replaced) completes.
    capsys.readouterr()
    assert main(argv) == 0, capsys.readouterr().err
    for f in OUTPUT_FILES:
        _complete(out / f)
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert sorted(run["outputs"]) == sorted(OUTPUT_FILES)
    assert sorted(p.name for p in out.iterdir()) == sorted(OUTPUT_FILES)  # no stale temp
    # A finished run is not overwritten without --force.
    before = (out / "spots.csv").read_bytes()
    assert main(argv) == 2
    assert "--force" in capsys.readouterr().err
    assert (out / "spots.csv").read_bytes() == before


def test_sigkill_during_a_forced_rewrite(card, tmp_path, capsys):
    # Replacing a finished run with --force and dying half-way must not leave a folder
    # that looks finished: run.json (the marker) goes first, so the rerun completes it.
    from ecl_quant.measure import OUTPUT_FILES

    out = tmp_path / "out"
    argv = ["measure", str(card), "--out", str(out), "--quiet"]
    assert main(argv) == 0
    _kill_when_paused(_spawn(_PAUSE_AT_RENAME, str(out), "3", *argv, "--force"))
    assert not (out / "run.json").exists()
    for v in (p for p in out.iterdir() if not p.name.startswith(".")):
        _complete(v)
    capsys.readouterr()
    assert main(argv) == 0, capsys.readouterr().err
    assert sorted(p.name for p in out.iterdir()) == sorted(OUTPUT_FILES)  # no stale temp


# ------------------------------------------------------------------ batch lock


@pytest.fixture()
def study(card, tmp_path):
    """A manifest of three recordings (blank and two standards) made from the card."""
    import shutil

    folder = tmp_path / "study"
    folder.mkdir()
    for name in ("blank", "std1", "std2"):
        shutil.copytree(card, folder / name)
    (folder / "manifest.csv").write_text(
        "path,sample,role,concentration\nblank,pond blank,blank,0\nstd1,std 1,standard,1\n"
        "std2,std 2,standard,2\n", encoding="utf-8")
    return folder / "manifest.csv"


def test_second_batch_refuses_while_the_first_runs_then_resumes_after_sigkill(
        study, tmp_path, capsys):
    out = tmp_path / "out"
    argv = ["batch", str(study), "--out", str(out), "--workers", "1", "--quiet"]
    first = _spawn(_PAUSE_IN_BATCH, "2", *argv)
    try:
        line = first.stdout.readline()
        assert line.startswith("PAUSED"), first.stderr.read() if first.poll() else line
        # The first batch holds the folder: a second one refuses, in one line, naming it.
        capsys.readouterr()
        assert main(argv) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith(f"error: {out.resolve()}"), err
        assert "another batch" in err[0] and f"pid {first.pid}" in err[0]
    finally:
        first.send_signal(signal.SIGKILL)
        first.wait(timeout=30)
    # Killed mid-way: one recording finished, one partial folder, a stale lock file.
    rec_root = out / "recordings"
    done = [p for p in rec_root.iterdir() if (p / "done.json").is_file()]
    assert len(done) == 1
    assert not (out / "results.csv").exists()
    # The rerun takes the stale lock over, keeps the finished recording and completes.
    assert main(argv) == 0, capsys.readouterr().err
    batch = json.loads((out / "batch.json").read_text(encoding="utf-8"))
    assert batch["counts"]["from_cache"] == 1 and batch["counts"]["measured_now"] == 2
    assert batch["lock_taken_over"]["pid"] == first.pid
    assert not [p for p in rec_root.iterdir() if ".partial-" in p.name or ".old-" in p.name]
    assert not (out / ".ecl-quant.lock").exists()
