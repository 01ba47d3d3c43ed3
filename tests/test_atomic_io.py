"""Atomic writes: the temporary file of a writer that was killed is cleaned up later.

Outside references: rename(2) atomicity and kill(2) with signal 0 as an existence check
(POSIX.1-2017); SIGKILL runs no cleanup handler, so a writer killed between writing and
renaming leaves its temporary file behind.
"""

from __future__ import annotations

import os
import subprocess
import sys

from ecl_quant._io import write_text_atomic


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_a_dead_writers_temp_file_is_removed_by_the_next_write(tmp_path):
    target = tmp_path / "calibration.json"
    dead = tmp_path / f".calibration.json.{_dead_pid()}.abc123.tmp"
    dead.write_text("half")
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        live = tmp_path / f".calibration.json.{sleeper.pid}.def456.tmp"
        live.write_text("being written")
        legacy = tmp_path / ".calibration.json.xyz.tmp"  # no pid: not ours to judge
        legacy.write_text("?")
        other = tmp_path / f".results.csv.{_dead_pid()}.ghi789.tmp"  # another target
        other.write_text("?")
        write_text_atomic(target, "{}\n")
        assert target.read_text() == "{}\n"
        assert not dead.exists()
        assert live.exists() and legacy.exists() and other.exists()
    finally:
        sleeper.kill()
        sleeper.wait()


def test_the_temp_file_carries_the_writers_pid(tmp_path, monkeypatch):
    # The scheme the cleanup relies on: .NAME.<pid>.<random>.tmp beside the target.
    seen = []
    real = os.replace

    def spy(src, dst, *a, **k):
        seen.append(os.path.basename(os.fspath(src)))
        return real(src, dst, *a, **k)

    monkeypatch.setattr(os, "replace", spy)
    write_text_atomic(tmp_path / "x.txt", "1")
    assert len(seen) == 1
    assert seen[0].startswith(f".x.txt.{os.getpid()}.") and seen[0].endswith(".tmp")
