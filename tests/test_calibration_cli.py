"""`ecl-quant calibrate` and `ecl-quant quantify`: outputs, units, one-line errors, exit 2,
nothing written on bad input (exit codes: common practice for Unix tools). Data: the
Miller & Miller fluorescence standards (tests/data) and simulated tables.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ecl_quant.calibration import load_calibration
from ecl_quant.cli import main

DATA = Path(__file__).parent / "data"


def _miller_table(path: Path) -> Path:
    df = pd.read_csv(DATA / "miller_fluorescence.csv")
    df.rename(columns={"x": "conc_pg_ml", "y": "fluor"}).to_csv(path, index=False)
    return path


def test_calibrate_then_quantify(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    table = _miller_table(tmp_path / "standards.csv")
    out = tmp_path / "cal" / "calibration.json"
    rc = main(["calibrate", str(table), "--x", "conc_pg_ml", "--y", "fluor", "--model",
               "linear", "--units", "pg/mL", "--out", str(out)])
    text = capsys.readouterr().out
    assert rc == 0
    assert out.is_file() and out.with_suffix(".png").read_bytes()[:4] == b"\x89PNG"
    assert "pg/mL" in text and "slope = 1.93036" in text  # Miller & Miller: b = 1.93
    doc = json.loads(out.read_text())
    assert doc["units"]["concentration"] == "pg/mL" and doc["model"]["name"] == "linear"
    unknowns = tmp_path / "unknowns.csv"
    pd.DataFrame({"sample": ["A", "B", "B"], "fluor": [2.9, 13.5, 13.5]}).to_csv(unknowns,
                                                                                  index=False)
    res_path = tmp_path / "results.csv"
    rc = main(["quantify", str(unknowns), "--calibration", str(out), "--y", "fluor",
               "--out", str(res_path)])
    text = capsys.readouterr().out
    assert rc == 0 and "pg/mL" in text
    res = pd.read_csv(res_path, keep_default_na=False)
    # Miller & Miller: x0 = 0.72 pg/mL, s_x0 = 0.26 at y0 = 2.9 (chemCal value 0.2645698)
    np.testing.assert_allclose(res.loc[0, "concentration"], 0.7160037, rtol=1e-6)
    np.testing.assert_allclose(res.loc[0, "se"], 0.2645698, rtol=1e-6)
    assert res.loc[1, "n"] == 2 and res.loc[1, "units"] == "pg/mL"
    prov = json.loads(res_path.with_suffix(".json").read_text())
    assert prov["arguments"]["calibration_sha256"] == doc["sha256"]
    rc = main(["quantify", str(unknowns), "--calibration", str(out), "--y", "fluor",
               "--out", str(res_path), "--method", "bootstrap", "--draws", "500", "--quiet"])
    assert rc == 2 and "--force" in capsys.readouterr().err  # existing results kept
    rc = main(["quantify", str(unknowns), "--calibration", str(out), "--y", "fluor",
               "--out", str(res_path), "--method", "bootstrap", "--draws", "500", "--quiet",
               "--force"])
    assert rc == 0 and capsys.readouterr().out == ""
    assert (pd.read_csv(res_path)["method"] == "bootstrap").all()


def _run_bad(argv: list[str], out_dir: Path, capsys: pytest.CaptureFixture[str]) -> str:
    before = sorted(p.name for p in out_dir.iterdir())
    rc = main(argv)
    err = capsys.readouterr().err
    assert rc == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert "Traceback" not in err
    assert sorted(p.name for p in out_dir.iterdir()) == before  # nothing written
    return lines[0]


@pytest.mark.parametrize("content, extra, needle", [
    ("concentration,response\n0,1\n1,2\n1,2.1\n", [], "distinct concentrations"),
    ("concentration,response\n0,1\n1,2\n2,3\n4,5\n", ["--model", "4pl"], "at least 5"),
    ("concentration,response\n0,1\n1,nan\n2,3\n4,5\n", [], "empty"),
    ("concentration,response\n0,1\n1,abc\n2,3\n4,5\n", [], "must hold numbers"),
    ("concentration,response\n0,1\n-1,2\n2,3\n4,5\n", [], "negative concentration"),
    ("concentration,response\n0,2\n1,2\n2,2\n4,2\n", [], "does not change"),
    ("concentration,response\n0,1\n1,2\n2,3\n4,5.2\n", ["--model", "cubic"], "unknown model"),
    ("conc,response\n0,1\n1,2\n2,3\n4,5.2\n", [], "no column 'concentration'"),
])
def test_calibrate_bad_input(tmp_path: Path, capsys: pytest.CaptureFixture[str], content: str,
                             extra: list[str], needle: str) -> None:
    table = tmp_path / "standards.csv"
    table.write_text(content)
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    line = _run_bad(["calibrate", str(table), "--out", str(out_dir / "calibration.json"),
                     *extra], out_dir, capsys)
    assert needle in line and str(table) in line


def test_calibrate_missing_table(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    line = _run_bad(["calibrate", str(tmp_path / "none.csv"), "--out",
                     str(tmp_path / "c.json")], tmp_path, capsys)
    assert "no such file" in line


def _calibrated(tmp_path: Path) -> Path:
    table = _miller_table(tmp_path / "standards.csv")
    out = tmp_path / "calibration.json"
    assert main(["calibrate", str(table), "--x", "conc_pg_ml", "--y", "fluor", "--quiet",
                 "--no-plot", "--out", str(out)]) == 0
    return out


@pytest.mark.parametrize("edit, needle", [
    (lambda d: d["parameters"].update(slope=2.0), "sha256"),
    (lambda d: d.update(version=7), "newer ecl_quant"),
    (lambda d: d.update(extra_key=1), "extra_key"),
])
def test_quantify_refuses_bad_calibration(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                          edit, needle: str) -> None:
    cal_path = _calibrated(tmp_path)
    doc = json.loads(cal_path.read_text())
    edit(doc)
    cal_path.write_text(json.dumps(doc))
    unknowns = tmp_path / "u.csv"
    unknowns.write_text("response\n5.0\n")
    out_dir = tmp_path / "res"
    out_dir.mkdir()
    line = _run_bad(["quantify", str(unknowns), "--calibration", str(cal_path), "--out",
                     str(out_dir / "results.csv")], out_dir, capsys)
    assert needle in line and str(cal_path) in line


def test_quantify_without_response_column(tmp_path: Path,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    cal_path = _calibrated(tmp_path)
    assert load_calibration(cal_path).model == "linear"
    unknowns = tmp_path / "u.csv"
    unknowns.write_text("sample,signal\nA,5.0\n")
    out_dir = tmp_path / "res"
    out_dir.mkdir()
    line = _run_bad(["quantify", str(unknowns), "--calibration", str(cal_path), "--out",
                     str(out_dir / "results.csv")], out_dir, capsys)
    assert "no column 'response'" in line and str(unknowns) in line
