"""Calibration files and tables (private helper of :mod:`ecl_quant.calibration`).

The calibration document is JSON with ``format``, ``version`` and a ``sha256`` of its
canonical form (sorted keys, no spaces, every other key included), checked against
``schemas/calibration.schema.json`` with jsonschema on save and on load.
"""

from __future__ import annotations

import hashlib
import json
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from .errors import CalibrationError, InputFormatError

__all__ = ["canonical_hash", "load_schema", "check_schema", "read_table", "numeric_column"]


def canonical_hash(doc: dict[str, Any]) -> str:
    """SHA-256 hex digest of ``doc`` without its ``sha256`` key, in canonical JSON."""
    body = {k: v for k, v in doc.items() if k != "sha256"}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                      allow_nan=False)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


@lru_cache(maxsize=1)
def load_schema() -> dict[str, Any]:
    """The calibration JSON schema shipped with the package."""
    text = resources.files("ecl_quant").joinpath("schemas/calibration.schema.json").read_text("utf-8")
    return json.loads(text)


def check_schema(doc: dict[str, Any], *, path: str | Path | None = None) -> None:
    """Raise CalibrationError naming the first schema violation (with its JSON location)."""
    import jsonschema

    validator = jsonschema.Draft202012Validator(load_schema())
    errors = sorted(validator.iter_errors(doc), key=lambda e: (len(e.absolute_path), e.message))
    if errors:
        err = errors[0]
        where = "/".join(str(p) for p in err.absolute_path) or "top level"
        more = f" (and {len(errors) - 1} more)" if len(errors) > 1 else ""
        raise CalibrationError(f"not a valid calibration file: at {where}: {err.message}{more}; "
                               "refit it with `ecl-quant calibrate`", path=path)


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV (``.csv``, ``.txt``; ``.tsv`` tab-separated) or Parquet table.

    Raises
    ------
    InputFormatError
        Missing, empty or unreadable file, or an unknown suffix.
    """
    p = Path(path)
    if not p.is_file():
        raise InputFormatError("no such file; give the path of a CSV or Parquet table", path=p)
    suffix = p.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            df = pd.read_parquet(p)
        elif suffix in (".csv", ".txt", ".tsv"):
            df = pd.read_csv(p, sep="\t" if suffix == ".tsv" else ",", skipinitialspace=True)
        else:
            raise InputFormatError(f"unknown table type {suffix!r}; use .csv or .parquet", path=p)
    except InputFormatError:
        raise
    except pd.errors.EmptyDataError as err:
        raise InputFormatError("the table is empty; export the readings as CSV with a "
                               "header line, e.g. concentration,response", path=p) from err
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError, OSError, ImportError) as err:
        raise InputFormatError(f"cannot read the table ({type(err).__name__}: {err})".splitlines()[0],
                               path=p) from err
    if df.shape[0] == 0:
        raise InputFormatError("the table has a header but no rows", path=p)
    df.columns = [str(c).strip() for c in df.columns]
    return df


def require_column(df: pd.DataFrame, col: str, option: str, *, path: str | Path | None) -> None:
    """InputFormatError when ``col`` is missing, listing the columns there are."""
    if col not in df.columns:
        have = ", ".join(map(str, df.columns)) or "none"
        raise InputFormatError(f"no column {col!r} (columns: {have}); name it with {option}",
                               path=path)


def numeric_column(df: pd.DataFrame, col: str, *, rows: NDArray[np.bool_] | None = None,
                   allow_missing: bool = False, path: str | Path | None = None) -> NDArray[np.float64]:
    """Column ``col`` as float64; text or (unless allowed) empty cells raise InputFormatError.

    Row numbers in messages count data rows from 1 (the header is not counted).
    """
    raw = df[col]
    vals = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    mask = np.ones(len(df), bool) if rows is None else rows
    present = raw.notna().to_numpy() & ~(raw.astype(str).str.strip() == "").to_numpy()
    text = mask & present & ~np.isfinite(vals) & ~np.isinf(vals)
    if text.any():
        i = int(np.flatnonzero(text)[0])
        raise InputFormatError(f"column {col!r} must hold numbers but data row {i + 1} holds "
                               f"{raw.iloc[i]!r}; fix or remove that row", path=path)
    inf = mask & np.isinf(vals)
    if inf.any():
        i = int(np.flatnonzero(inf)[0])
        raise InputFormatError(f"column {col!r} holds an infinite value at data row {i + 1}",
                               path=path)
    if not allow_missing:
        missing = mask & ~np.isfinite(vals)
        if missing.any():
            i = int(np.flatnonzero(missing)[0])
            raise InputFormatError(f"column {col!r} is empty (NaN) at data row {i + 1}; fill it "
                                   "or remove the row", path=path)
    return vals
