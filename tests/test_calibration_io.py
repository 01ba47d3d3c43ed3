"""calibration.json, tables and bad input.

The calibration file is checked with jsonschema (reference library) against the shipped
schema, and with hashlib's SHA-256 of the canonical JSON. Tables use the Massart et al.
(1997) example 3 data (tests/data) and simulated standards with known truth.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import jsonschema
import numpy as np
import pandas as pd
import pytest

from ecl_quant._calio import load_schema
from ecl_quant.calibration import (
    Calibration,
    CalibrationOptions,
    calibrate_table,
    calibration_hash,
    fit_calibration,
    load_calibration,
    plot_calibration,
    quantify_table,
    read_table,
    save_calibration,
)
from ecl_quant.errors import CalibrationError, InputFormatError

DATA = Path(__file__).parent / "data"


def _standards_table(seed: int = 1) -> pd.DataFrame:
    # simulated: blanks (role column, empty concentration), triplicate standards, unknowns
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(6):
        rows.append(("blank", f"b{i}", np.nan, 0.8 + rng.normal(0, 0.05), 0.05))
    for c in (1.0, 2.0, 5.0, 10.0, 20.0):
        for r in range(3):
            rows.append(("standard", f"s{c:g}", c, 0.8 + 1.5 * c + rng.normal(0, 0.15), 0.1))
    rows += [("unknown", "u1", np.nan, 8.3, 0.1), ("unknown", "u1", np.nan, 8.1, 0.1),
             ("unknown", "u2", np.nan, 60.0, 0.1), ("unknown", "u3", np.nan, 0.82, 0.1)]
    return pd.DataFrame(rows, columns=["role", "sample", "concentration", "response",
                                       "response_se"])


def _sigmoid_table() -> pd.DataFrame:
    rng = np.random.default_rng(3)
    x = np.repeat([0.0, 0.5, 1, 2, 4, 8, 16, 32, 64], 3)
    y = 25.0 + (1.0 - 25.0) / (1 + (x / 6.0) ** 1.4) + rng.normal(0, 0.25, x.size)
    return pd.DataFrame({"concentration": x, "response": y})


# ---------------------------------------------------------------- files
@pytest.mark.parametrize("model, weights", [("linear", None), ("wls", "1/var"),
                                            ("quadratic", None), ("power", None), ("4pl", None)])
def test_save_load_round_trip(tmp_path: Path, model: str, weights: str | None) -> None:
    if model == "4pl":
        df = _sigmoid_table()
    else:
        df = pd.read_csv(DATA / "massart97ex3.csv").rename(columns={"x": "concentration",
                                                                    "y": "response"})
        if model == "power":
            df = df[df["concentration"] > 0]
    cal = calibrate_table(df, model=model, weights=weights, units="umol/L",
                          response_units="a.u.")
    path = tmp_path / "calibration.json"
    digest = save_calibration(cal, path)
    doc = json.loads(path.read_text())
    jsonschema.validate(doc, load_schema())  # reference validator, draft 2020-12
    body = {k: v for k, v in doc.items() if k != "sha256"}
    canon = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    assert doc["sha256"] == digest == hashlib.sha256(canon.encode()).hexdigest()
    back = load_calibration(path)
    assert back.to_dict() == cal.to_dict()
    assert calibration_hash(back) == digest
    assert back.units == "umol/L" and doc["units"] == {"concentration": "umol/L",
                                                       "response": "a.u."}
    y0 = float(cal.predict(np.median(cal.x[cal.x > 0])))
    for method in ("analytic", "bootstrap"):
        assert back.inverse_predict([y0, y0 * 1.01], method=method) == \
            cal.inverse_predict([y0, y0 * 1.01], method=method)
    for key in ("model", "parameters", "covariance", "s_yx", "n", "limits", "tests", "units",
                "data", "provenance"):
        assert key in doc
    assert doc["provenance"]["software"] == "ecl_quant" and doc["provenance"]["created_utc"]


def _saved(tmp_path: Path) -> tuple[Path, dict]:
    df = pd.read_csv(DATA / "miller_fluorescence.csv").rename(
        columns={"x": "concentration", "y": "response"})
    path = tmp_path / "calibration.json"
    save_calibration(calibrate_table(df, model="linear", units="pg/mL"), path)
    return path, json.loads(path.read_text())


def _rehash(doc: dict) -> dict:
    body = {k: v for k, v in doc.items() if k != "sha256"}
    canon = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return {**doc, "sha256": hashlib.sha256(canon.encode()).hexdigest()}


def test_tampered_file_is_refused(tmp_path: Path) -> None:
    path, doc = _saved(tmp_path)
    doc["parameters"]["slope"] *= 1.01
    path.write_text(json.dumps(doc))
    with pytest.raises(CalibrationError, match="sha256") as err:
        load_calibration(path)
    assert err.value.path == str(path)


def test_future_version_is_refused(tmp_path: Path) -> None:
    path, doc = _saved(tmp_path)
    path.write_text(json.dumps(_rehash({**doc, "version": 2})))
    with pytest.raises(CalibrationError, match="newer ecl_quant"):
        load_calibration(path)


@pytest.mark.parametrize("change", ["extra_top", "extra_nested", "missing", "bad_model"])
def test_schema_violations_are_refused(tmp_path: Path, change: str) -> None:
    # hash recomputed, so only the schema can catch these
    path, doc = _saved(tmp_path)
    if change == "extra_top":
        doc["comment"] = "edited"
    elif change == "extra_nested":
        doc["units"]["time"] = "s"
    elif change == "missing":
        del doc["covariance"]
    else:
        doc["model"]["name"] = "spline"
    path.write_text(json.dumps(_rehash(doc)))
    with pytest.raises(CalibrationError, match="not a valid calibration file"):
        load_calibration(path)


def test_not_json_or_not_a_calibration(tmp_path: Path) -> None:
    bad = tmp_path / "c.json"
    bad.write_text("{not json")
    with pytest.raises(InputFormatError, match="not valid JSON"):
        load_calibration(bad)
    bad.write_text(json.dumps({"format": "something-else"}))
    with pytest.raises(CalibrationError, match="not an ecl_quant calibration"):
        load_calibration(bad)
    with pytest.raises(InputFormatError, match="no such calibration file"):
        load_calibration(tmp_path / "missing.json")


def test_plot_writes_png(tmp_path: Path) -> None:
    cal = calibrate_table(_standards_table(), units="umol/L")
    path = tmp_path / "calibration.png"
    data = plot_calibration(cal, path)
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and path.read_bytes() == data and len(data) > 10000
    assert plot_calibration(fit_calibration(*_power_xy(), model="power"))[:4] == b"\x89PNG"


def _power_xy() -> tuple[np.ndarray, np.ndarray]:
    x = np.repeat([1.0, 2, 4, 8, 16], 2)
    return x, 2.0 * x**0.7 * (1 + 0.01 * np.tile([1, -1], 5))


# ---------------------------------------------------------------- tables
def test_calibrate_table_roles_blanks_and_unknowns() -> None:
    df = _standards_table()
    before = df.copy()
    cal = calibrate_table(df, model="linear", units="umol/L")
    pd.testing.assert_frame_equal(df, before)  # input untouched
    assert (cal.role == "blank").sum() == 6 and cal.n == 21  # blanks fitted at 0
    assert any("unknown ignored" in n for n in cal.notes)
    lim = cal.limits
    assert lim["method"] == "blank" and lim["blank"]["n_blanks"] == 6
    # IUPAC Gold Book L03540: x_L = mean_blank + k s_blank, read back through the line
    blanks = df.loc[df["role"] == "blank", "response"].to_numpy()
    a, b = cal.params
    x_l = blanks.mean() + 3 * blanks.std(ddof=1)
    np.testing.assert_allclose(cal.lod, (x_l - a) / b, rtol=1e-12)
    np.testing.assert_allclose(cal.loq, (blanks.mean() + 10 * blanks.std(ddof=1) - a) / b,
                               rtol=1e-12)
    assert cal.working_range["low"] == max(cal.loq, 1.0) and cal.working_range["high"] == 20.0


def test_quantify_table_groups_and_flags() -> None:
    df = _standards_table()
    cal = calibrate_table(df, model="linear", units="umol/L")
    unknowns = df[df["role"] == "unknown"]
    res = quantify_table(unknowns, cal)
    assert list(res.columns) == ["sample", "role", "n", "response_mean", "response_sd",
                                 "concentration", "se", "ci_low", "ci_high", "level",
                                 "method", "flags", "units"]
    assert res["sample"].tolist() == ["u1", "u2", "u3"]
    u1 = res.iloc[0]
    assert u1["n"] == 2 and u1["response_mean"] == pytest.approx(8.2)
    single = cal.inverse_predict([8.3, 8.1], y_se=[0.1, 0.1])
    assert u1["concentration"] == single.concentration and u1["se"] == single.se
    assert u1["ci_low"] < u1["concentration"] < u1["ci_high"] and u1["flags"] == ""
    assert set(res.iloc[1]["flags"].split(";")) == {"above_range", "extrapolated"}
    assert {"below_lod", "below_loq"} <= set(res.iloc[2]["flags"].split(";"))
    assert (res["units"] == "umol/L").all()
    prov = res.attrs["provenance"]
    assert prov["arguments"]["calibration_sha256"] == calibration_hash(cal) and prov["version"]


def test_quantify_no_solution_beyond_the_asymptote() -> None:
    cal = calibrate_table(_sigmoid_table(), model="4pl")
    d = cal.parameters["d"]
    res = quantify_table(pd.DataFrame({"response": [d + 10.0, 12.0]}), cal)
    assert res["sample"].tolist() == ["row1", "row2"]
    assert set(res.iloc[0]["flags"].split(";")) == {"no_solution", "above_range"}
    assert np.isnan(res.iloc[0]["concentration"])
    assert res.iloc[1]["method"] == "delta" and np.isfinite(res.iloc[1]["se"])


def test_quantify_bootstrap_shares_refits() -> None:
    df = _standards_table()
    cal = calibrate_table(df, model="linear")
    res = quantify_table(df[df["role"] == "unknown"], cal, method="bootstrap", n_draws=500, seed=3)
    assert (res["method"] == "bootstrap").all()
    one = cal.inverse_predict([8.3, 8.1], y_se=[0.1, 0.1], method="bootstrap", n_draws=500, seed=3)
    assert res.iloc[0]["se"] == pytest.approx(one.se, rel=0.15)


def test_read_csv_and_parquet(tmp_path: Path) -> None:
    df = _standards_table()
    df.to_csv(tmp_path / "t.csv", index=False)
    df.to_parquet(tmp_path / "t.parquet")
    a = calibrate_table(read_table(tmp_path / "t.csv"), model="linear")
    b = calibrate_table(read_table(tmp_path / "t.parquet"), model="linear")
    np.testing.assert_allclose(a.params, b.params, rtol=1e-12)
    with pytest.raises(InputFormatError, match="no such file"):
        read_table(tmp_path / "nope.csv")
    (tmp_path / "t.xlsx").write_text("x")
    with pytest.raises(InputFormatError, match="unknown table type"):
        read_table(tmp_path / "t.xlsx")


# ---------------------------------------------------------------- bad input
def _table(**cols: list) -> pd.DataFrame:
    return pd.DataFrame(cols)


@pytest.mark.parametrize("df, kwargs, error, pattern", [
    (_table(concentration=[0, 1, 1, 0], response=[1, 2, 2.1, 1.1]), {}, CalibrationError,
     "at least 3 distinct concentrations"),
    (_table(concentration=[0, 1, 2, 4], response=[1, 2, 3, 4]), {"model": "4pl"},
     CalibrationError, "at least 5 distinct"),
    (_table(concentration=[0, 1, np.nan, 4], response=[1, 2, 3, 4]), {}, InputFormatError,
     "empty"),
    (_table(concentration=["0", "1", "two", "4"], response=[1, 2, 3, 4]), {}, InputFormatError,
     "must hold numbers"),
    (_table(concentration=[0, 1, 2, 4], response=[1, "x", 3, 4]), {}, InputFormatError,
     "must hold numbers"),
    (_table(concentration=[0, -1, 2, 4], response=[1, 2, 3, 4]), {}, CalibrationError,
     "negative concentration"),
    (_table(concentration=[0, 1, 2, 4], response=[3, 3, 3, 3]), {}, CalibrationError,
     "does not change"),
    (_table(concentration=[0, 1, 2, 4], response=[1, 2, 3, 4.1]), {"model": "spline"},
     CalibrationError, "unknown model"),
    (_table(concentration=[0, 1, 2, 4], response=[1, 2, 3, 4.1]), {"weights": "1/z"},
     CalibrationError, "unknown weight rule"),
    (_table(conc=[0, 1, 2, 4], response=[1, 2, 3, 4.1]), {}, InputFormatError,
     "no column 'concentration'"),
    (_table(concentration=[0, 1, 2, 4], response=[1, 2, 3, 4.1], role=[
        "blank", "standard", "std", "standard"]), {}, InputFormatError, "use standard, blank"),
])
def test_bad_tables(df: pd.DataFrame, kwargs: dict, error: type, pattern: str) -> None:
    with pytest.raises(error, match=pattern) as err:
        calibrate_table(df, path="standards.csv", **kwargs)
    assert err.value.path == "standards.csv"
    assert "\n" not in str(err.value)


def test_quantify_without_response_column() -> None:
    cal = calibrate_table(_standards_table(), model="linear")
    with pytest.raises(InputFormatError, match="no column 'response'") as err:
        quantify_table(pd.DataFrame({"signal": [1.0]}), cal, path="unknowns.csv")
    assert err.value.path == "unknowns.csv"


def test_options_are_checked() -> None:
    with pytest.raises(CalibrationError, match="lod_method"):
        CalibrationOptions(lod_method="guess")
    with pytest.raises(CalibrationError, match="wls needs weights"):
        fit_calibration([0, 1, 2, 3], [1, 2, 3, 4.2], model="wls")
    with pytest.raises(CalibrationError, match="method"):
        fit_calibration([0, 1, 2, 3], [1, 2, 3, 4.2]).inverse_predict(2.0, method="magic")


def test_calibration_is_frozen() -> None:
    cal = fit_calibration([0, 1, 2, 3, 4], [1, 2.1, 2.9, 4.2, 5.0], model="linear")
    assert isinstance(cal, Calibration)
    with pytest.raises(AttributeError):
        cal.s_yx = 0.0  # type: ignore[misc]
    with pytest.raises(ValueError):
        cal.params[0] = 1.0
