"""Smoke test of the benchmark harness (benchmarks/run.py) on very small inputs.

It checks only that a run writes a results JSON with every figure present and finite,
plus the machine's core count and library versions. No timing is asserted: speed and
memory figures are for ``make bench`` (common practice: timings do not belong in unit
tests, they depend on the machine).
"""

from __future__ import annotations

import json
import math
import os
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def bench_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[int, dict]:
    if str(REPO) not in sys.path:
        sys.path.insert(0, str(REPO))
    from benchmarks import run

    tmp = tmp_path_factory.mktemp("bench")
    out = tmp / "results.json"
    code = run.main(["--config", "tiny", "--cache", str(tmp / "cache"), "--out", str(out),
                     "--quiet"])
    return code, json.loads(out.read_text(encoding="utf-8"))


def test_every_figure_is_finite(bench_run: tuple[int, dict]) -> None:
    from benchmarks.run import LABELS, TARGETS

    code, doc = bench_run
    assert doc["errors"] == {}
    assert code == 0
    assert set(doc["figures"]) == set(LABELS) and set(TARGETS) <= set(LABELS)
    for name, entry in doc["figures"].items():
        value = entry["value"]
        assert isinstance(value, (int, float)) and math.isfinite(value), (name, value)
        if name in TARGETS:
            assert entry["met"] in (True, False), name
        else:  # a figure shown for information has no verdict
            assert "met" not in entry, name
    batch = doc["figures"]["batch_speedup"]
    if sys.platform.startswith("linux"):  # machine-wide CPU time from /proc/stat
        assert batch["cores_1"] > 0 and batch["cores_2"] > 0


def test_machine_and_versions_recorded(bench_run: tuple[int, dict]) -> None:
    _code, doc = bench_run
    assert doc["machine"]["cores"] == os.cpu_count()
    for dist in ("numpy", "av", "ecl_quant"):
        assert doc["versions"][dist]
    assert doc["config"] == "tiny"
