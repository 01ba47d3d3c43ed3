"""Batch runs: manifests, parallel measurement, cache and resume, calibration, results.

A batch reads a manifest (CSV, one row per recording or per spot), validates all of it
before any work starts and reports every problem at once, measures every recording (in
this process, in a local process pool, or on a dask.distributed cluster), keeps each
recording's outputs in a folder keyed by the SHA-256 of its input files and the
parameters (so a batch that was stopped redoes only what is missing), then calibrates
on the standards and blanks and quantifies the unknowns.

Output folder layout (``--out DIR``)::

    DIR/.ecl-quant.lock        held while a batch writes DIR (advisory lock + pid)
    DIR/.ecl-quant-batch       marker: DIR belongs to a batch
    DIR/recordings/<id>/       measure outputs of one recording + done.json (cache key)
    DIR/measurements.csv       one row per spot assigned to a sample
    DIR/qc.csv                 field QC per recording
    DIR/calibration.json       the fitted calibration
    DIR/results.csv            concentrations of the unknowns with SE, CI and flags
    DIR/errors.csv             recordings (or manifest rows) that failed, and why
    DIR/batch.json             parameters, versions, statuses
    DIR/report.html            self-contained report
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import hashlib
import json
import math
import os
import re
import socket
import sys
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from ._io import sha256_file
from .errors import EclQuantError, InputFormatError, OutputError
from .transfer import parse_transfer

__all__ = [
    "ManifestError",
    "ClusterError",
    "ROLES",
    "CHANNELS",
    "MANIFEST_COLUMNS",
    "ManifestRow",
    "RecordingSpec",
    "Manifest",
    "read_manifest",
    "parse_spot_list",
    "confine_path",
    "content_digest",
    "recording_key",
    "OutputLock",
    "iter_completed",
]

ROLES = ("blank", "standard", "unknown")
CHANNELS = ("red", "green", "blue", "luma", "raw")
#: Columns a manifest may have; ``path``, ``sample`` and ``role`` are required.
MANIFEST_COLUMNS = (
    "path", "sample", "role", "concentration", "spot", "dark", "spots", "channel",
    "transfer", "exposure_s", "noise_from", "notes",
)
_REQUIRED = ("path", "sample", "role")
_ALIASES = {"spots_file": "spots", "spot_file": "spots", "roi": "spots", "rois": "spots",
            "comment": "notes", "note": "notes", "comments": "notes", "exposure": "exposure_s"}
#: Folder-name characters kept when naming a recording's output folder.
_ID_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


class ManifestError(InputFormatError):
    """The manifest has one or more problems; ``problems`` lists every one of them."""

    def __init__(self, problems: Sequence[str], *, path: str | Path | None = None) -> None:
        self.problems = tuple(problems)
        n = len(self.problems)
        if n == 1:  # one problem: one line (what the CLI prints)
            super().__init__(f"{self.problems[0]}; fix it and run again", path=path)
            return
        head = f"{n} problems in the manifest; fix them and run again:"
        super().__init__(head + "".join(f"\n  - {p}" for p in self.problems), path=path)


class ClusterError(EclQuantError):
    """The dask.distributed scheduler cannot be reached or used."""


# ------------------------------------------------------------------ manifest model


@dataclass(frozen=True)
class ManifestRow:
    """One validated manifest row.

    Attributes
    ----------
    line : int
        Line number in the manifest file (the header is line 1).
    path : Path
        The recording (file or folder), resolved to an absolute path.
    path_text : str
        The path as written in the manifest.
    sample : str
        Sample name; replicates share it.
    role : {"blank", "standard", "unknown"}
    concentration : float or None
        Known concentration (standards; 0 for blanks), in the batch's units.
    spots : tuple of int or None
        1-based spot numbers of the recording that belong to this sample;
        None means every spot of the recording.
    dark, spots_file : Path or None
        Resolved dark-frame source and spot file.
    channel, transfer : str or None
        Per-row overrides (``transfer`` with a profile path made absolute).
    exposure_s : float or None
        Exposure time for frames that carry none (video), s.
    noise_from : Path or None
        A camera.json (``ecl-quant camera``) whose gain and dark noise replace the noise
        model estimated from the recording.
    notes : str
    """

    line: int
    path: Path
    path_text: str
    sample: str
    role: str
    concentration: float | None
    spots: tuple[int, ...] | None
    dark: Path | None = None
    spots_file: Path | None = None
    channel: str | None = None
    transfer: str | None = None
    exposure_s: float | None = None
    noise_from: Path | None = None
    notes: str = ""


@dataclass(frozen=True)
class RecordingSpec:
    """One recording to measure and the manifest rows that use it.

    Attributes
    ----------
    rec_id : str
        Name of the recording's output folder under ``DIR/recordings``.
    path : Path
    path_text : str
    dark, spots_file : Path or None
    channel, transfer : str or None
        Overrides shared by all of the recording's rows (None = batch default).
    exposure_s : float or None
        Exposure time for frames without one (video), s.
    noise_from : Path or None
        camera.json of the noise model (see :class:`ManifestRow`).
    lines : tuple of int
        Manifest lines that refer to this recording.
    """

    rec_id: str
    path: Path
    path_text: str
    dark: Path | None
    spots_file: Path | None
    channel: str | None
    transfer: str | None
    lines: tuple[int, ...]
    exposure_s: float | None = None
    noise_from: Path | None = None


@dataclass(frozen=True)
class Manifest:
    """A validated manifest.

    Attributes
    ----------
    path : Path
        The manifest file (absolute).
    rows : tuple of ManifestRow
    recordings : tuple of RecordingSpec
        Distinct recordings in order of first appearance.
    allow_outside : bool
        Whether paths outside the manifest's folder were allowed.
    """

    path: Path
    rows: tuple[ManifestRow, ...]
    recordings: tuple[RecordingSpec, ...]
    allow_outside: bool = False

    @property
    def folder(self) -> Path:
        """The folder relative paths are resolved against."""
        return self.path.parent

    def rows_of(self, rec: RecordingSpec) -> tuple[ManifestRow, ...]:
        """The rows that refer to one recording, in manifest order."""
        wanted = set(rec.lines)
        return tuple(r for r in self.rows if r.line in wanted)

    def to_frame(self) -> Any:
        """The rows as a pandas DataFrame (one row per manifest line)."""
        import pandas as pd

        recs = {line: rec.rec_id for rec in self.recordings for line in rec.lines}
        return pd.DataFrame(
            {
                "line": [r.line for r in self.rows],
                "recording": [recs[r.line] for r in self.rows],
                "path": [r.path_text for r in self.rows],
                "sample": [r.sample for r in self.rows],
                "role": [r.role for r in self.rows],
                "concentration": [r.concentration for r in self.rows],
                "spot": [format_spot_list(r.spots) for r in self.rows],
            },
            columns=["line", "recording", "path", "sample", "role", "concentration", "spot"],
        )


# ------------------------------------------------------------------ paths


def confine_path(text: str, folder: Path, *, allow_outside: bool = False,
                 what: str = "path") -> Path:
    """Resolve a manifest path relative to ``folder`` and keep it inside that folder.

    Parameters
    ----------
    text : str
        The path as written (relative to ``folder``, or absolute).
    folder : Path
        The manifest's folder.
    allow_outside : bool
        Accept paths that resolve outside ``folder`` (``--allow-outside``).
    what : str
        Column name used in messages.

    Returns
    -------
    Path
        Absolute, with symbolic links resolved.

    Raises
    ------
    InputFormatError
        When the path resolves outside ``folder`` (after following ``..`` and symbolic
        links) and ``allow_outside`` is false.
    """
    base = folder.resolve()
    if "\x00" in text:
        raise InputFormatError(f"{what} {text!r} contains a NUL character")
    raw = Path(os.path.expanduser(text)) if text.startswith("~") else Path(text)
    try:
        resolved = (raw if raw.is_absolute() else base / raw).resolve()
    except (OSError, RuntimeError, ValueError) as err:
        raise InputFormatError(f"{what} {text!r} cannot be resolved ({err})") from err
    if not allow_outside and not resolved.is_relative_to(base):
        raise InputFormatError(
            f"{what} {text!r} resolves to {resolved}, outside the manifest's folder {base}; "
            "move the file next to the manifest or pass --allow-outside"
        )
    return resolved


# ------------------------------------------------------------------ spot lists

_SPOT_TOKEN = re.compile(r"^\s*(\d+)\s*(?:-\s*(\d+)\s*)?$")


def parse_spot_list(text: str) -> tuple[int, ...] | None:
    """Parse a spot column: empty -> None (all spots); ``3``, ``1;2;5``, ``1-4``, ``1-3;7``.

    Separators ``;``, ``,``, ``|``, ``+`` or spaces. Spot numbers are 1-based.

    Raises
    ------
    ValueError
        For anything else, a 0 or a descending range.
    """
    t = text.strip()
    if not t:
        return None
    out: list[int] = []
    for tok in re.split(r"[;,|+\s]+", t):
        if not tok:
            continue
        m = _SPOT_TOKEN.match(tok)
        if not m:
            raise ValueError(f"spot {text!r} is not a spot number or list (e.g. 3, 1;2;5, 1-4)")
        a = int(m.group(1))
        b = int(m.group(2)) if m.group(2) else a
        if a < 1 or b < a:
            raise ValueError(f"spot {text!r}: spot numbers start at 1 and ranges go up (1-4)")
        out.extend(range(a, b + 1))
    if len(set(out)) != len(out):
        raise ValueError(f"spot {text!r} names a spot twice")
    return tuple(out)


def _parse_exposure(text: str) -> float:
    """``0.0333`` or ``1/30`` -> seconds (> 0, finite)."""
    t = text.strip()
    if "/" in t:
        num, den = t.split("/", 1)
        value = float(num) / float(den)
    else:
        value = float(t)
    if not (math.isfinite(value) and value > 0):
        raise ValueError(text)
    return value


def format_spot_list(spots: tuple[int, ...] | None) -> str:
    """Inverse of :func:`parse_spot_list` (``""`` for all spots)."""
    return "" if spots is None else ";".join(str(s) for s in spots)


# ------------------------------------------------------------------ reading


def _norm_header(name: str) -> str:
    key = name.strip().lower().replace(" ", "_")
    return _ALIASES.get(key, key)


def _rec_id(path_text: str, used: set[str]) -> str:
    stem = _ID_UNSAFE.sub("_", path_text.strip().replace("\\", "/").strip("/")).strip("._")
    stem = stem.replace("/", "_")[:80] or "recording"
    rid, k = stem, 2
    while rid.lower() in used:
        rid = f"{stem}-{k}"
        k += 1
    used.add(rid.lower())
    return rid


def read_manifest(path: str | Path, *, allow_outside: bool = False,
                  check_exists: bool = True) -> Manifest:
    """Read and validate a manifest CSV; report every problem at once.

    Columns (case-insensitive, any order): ``path`` (recording file or folder, relative
    to the manifest), ``sample``, ``role`` (blank, standard, unknown), ``concentration``
    (required for standards, empty or 0 for blanks, empty for unknowns), ``spot``
    (which spots of the recording belong to the sample; empty = all spots), ``dark``
    (dark frames), ``spots`` (a spot file), ``channel`` and ``transfer`` (per-row
    overrides), ``exposure_s`` (exposure time in s, or a fraction such as ``1/30``, for
    recordings whose frames carry none: video), ``notes``. Blank lines and lines starting with ``#`` are skipped.

    Parameters
    ----------
    path : str or Path
        The manifest file.
    allow_outside : bool
        Accept paths that resolve outside the manifest's folder.
    check_exists : bool
        Check that every referenced file exists.

    Returns
    -------
    Manifest

    Raises
    ------
    InputFormatError
        When the file cannot be read.
    ManifestError
        Listing every problem found (line numbers refer to the file).
    """
    mpath = Path(path).expanduser().resolve()
    try:
        text = mpath.read_text(encoding="utf-8-sig")
    except FileNotFoundError as err:
        raise InputFormatError("manifest not found; give the path of a CSV file",
                               path=mpath) from err
    except IsADirectoryError as err:
        raise InputFormatError("this is a folder; give the manifest CSV file inside it",
                               path=mpath) from err
    except UnicodeDecodeError as err:
        raise InputFormatError("manifest is not UTF-8 text; save it as CSV (UTF-8)",
                               path=mpath) from err
    except OSError as err:
        raise InputFormatError(f"cannot read manifest ({err.strerror})", path=mpath) from err

    folder = mpath.parent
    problems: list[str] = []
    reader = csv.reader(text.splitlines())
    header: list[str] | None = None
    records: list[tuple[int, dict[str, str]]] = []
    try:
        parsed = [(reader.line_num, cells) for cells in reader]
    except csv.Error as err:
        raise ManifestError([f"line {reader.line_num}: not valid CSV ({err})"],
                            path=mpath) from err
    for line, cells in parsed:
        if not cells or all(not c.strip() for c in cells) or cells[0].lstrip().startswith("#"):
            continue
        if header is None:
            header = [_norm_header(c) for c in cells]
            unknown = [c for c in header if c and c not in MANIFEST_COLUMNS]
            if unknown:
                problems.append(
                    f"line {line}: unknown column(s) {', '.join(map(repr, unknown))}; "
                    f"known columns are {', '.join(MANIFEST_COLUMNS)}"
                )
            dup = sorted({c for c in header if c and header.count(c) > 1})
            if dup:
                problems.append(f"line {line}: column(s) {', '.join(dup)} appear twice")
            missing = [c for c in _REQUIRED if c not in header]
            if missing:
                problems.append(f"line {line}: required column(s) {', '.join(missing)} missing "
                                "(the first line must name the columns, e.g. path,sample,role,"
                                "concentration)")
            continue
        if len(cells) > len(header) and any(c.strip() for c in cells[len(header):]):
            problems.append(f"line {line}: {len(cells)} cells but the header names "
                            f"{len(header)} columns (a comma inside a value must be quoted)")
        rec = {h: (cells[i].strip() if i < len(cells) else "") for i, h in enumerate(header) if h}
        records.append((line, rec))
    if header is None:
        raise ManifestError(["the manifest is empty; it needs a header line and one row "
                             "per recording"], path=mpath)
    if not records:
        problems.append("the manifest has a header but no rows")
    if any(c not in header for c in _REQUIRED):
        raise ManifestError(problems, path=mpath)

    rows: list[ManifestRow] = []
    for line, rec in records:
        row_problems: list[str] = []

        def bad(msg: str, _line: int = line, _rp: list[str] = row_problems) -> None:
            _rp.append(f"line {_line}: {msg}")

        ptext = rec.get("path", "")
        rpath: Path | None = None
        if not ptext:
            bad("path is empty; give the recording (file or folder) relative to the manifest")
        else:
            try:
                rpath = confine_path(ptext, folder, allow_outside=allow_outside, what="path")
            except InputFormatError as err:
                bad(err.reason)
            else:
                if check_exists and not rpath.exists():
                    bad(f"recording {ptext!r} not found (looked for {rpath})")
        sample = rec.get("sample", "")
        if not sample:
            bad("sample is empty; name the sample (replicates share a name)")
        role = rec.get("role", "").lower()
        if role not in ROLES:
            bad(f"role {rec.get('role', '')!r} is not one of {', '.join(ROLES)}")
        conc: float | None = None
        ctext = rec.get("concentration", "")
        if ctext:
            try:
                conc = float(ctext)
            except ValueError:
                bad(f"concentration {ctext!r} is not a number (use a dot as decimal separator)")
            else:
                if not math.isfinite(conc) or conc < 0:
                    bad(f"concentration {ctext!r} must be a finite number >= 0")
                    conc = None
        if role == "standard" and not ctext:
            bad("a standard needs its concentration")
        elif role == "blank":
            if conc is not None and conc != 0:
                bad(f"a blank has concentration 0, not {ctext}; make the row a standard")
            conc = 0.0
        elif role == "unknown" and ctext:
            bad("an unknown has no concentration; leave it empty (or make the row a standard)")
            conc = None
        spots: tuple[int, ...] | None = None
        try:
            spots = parse_spot_list(rec.get("spot", ""))
        except ValueError as err:
            bad(str(err))
        resolved: dict[str, Path | None] = {"dark": None, "spots": None, "noise_from": None}
        for col in ("dark", "spots", "noise_from"):
            t = rec.get(col, "")
            if not t:
                continue
            try:
                p = confine_path(t, folder, allow_outside=allow_outside, what=col)
            except InputFormatError as err:
                bad(err.reason)
                continue
            if check_exists and not p.exists():
                bad(f"{col} {t!r} not found (looked for {p})")
            resolved[col] = p
        channel = rec.get("channel", "").lower() or None
        if channel is not None and channel not in CHANNELS:
            bad(f"channel {rec.get('channel')!r} is not one of {', '.join(CHANNELS)}")
        transfer = rec.get("transfer", "") or None
        if transfer is not None:
            try:
                spec = parse_transfer(transfer)
            except EclQuantError as err:
                bad(err.reason)
            else:
                if spec.kind == "profile":
                    try:
                        prof = confine_path(spec.profile_path or "", folder,
                                            allow_outside=allow_outside, what="transfer profile")
                    except InputFormatError as err:
                        bad(err.reason)
                    else:
                        if check_exists and not prof.is_file():
                            bad(f"transfer profile {spec.profile_path!r} not found "
                                f"(looked for {prof})")
                        transfer = f"profile={prof}"
                else:
                    transfer = str(spec)
        exposure: float | None = None
        etext = rec.get("exposure_s", "")
        if etext:
            try:
                exposure = _parse_exposure(etext)
            except (ValueError, ZeroDivisionError):
                bad(f"exposure_s {etext!r} is not a time in seconds (e.g. 0.0333 or 1/30)")
        if check_exists and resolved["noise_from"] is not None and not row_problems:
            try:
                _noise_options(resolved["noise_from"])
            except EclQuantError as err:
                bad(f"noise_from: {err.reason}")
        if row_problems:
            problems.extend(row_problems)
            continue
        assert rpath is not None
        rows.append(ManifestRow(line=line, path=rpath, path_text=ptext, sample=sample, role=role,
                                concentration=conc, spots=spots, dark=resolved["dark"],
                                spots_file=resolved["spots"], channel=channel,
                                transfer=transfer, exposure_s=exposure,
                                noise_from=resolved["noise_from"],
                                notes=rec.get("notes", "")))

    problems.extend(_cross_row_problems(rows))
    if check_exists:
        problems.extend(_spot_file_problems(rows))
    recordings = _group_recordings(rows, problems)
    if problems:
        raise ManifestError(problems, path=mpath)
    return Manifest(path=mpath, rows=tuple(rows), recordings=recordings,
                    allow_outside=allow_outside)


def _cross_row_problems(rows: Sequence[ManifestRow]) -> list[str]:
    problems: list[str] = []
    by_sample: dict[str, list[ManifestRow]] = {}
    for r in rows:
        by_sample.setdefault(r.sample, []).append(r)
    for name, rs in by_sample.items():
        roles = sorted({r.role for r in rs})
        if len(roles) > 1:
            lines = ", ".join(str(r.line) for r in rs)
            problems.append(f"lines {lines}: sample {name!r} has roles {', '.join(roles)}; "
                            "one sample has one role (rename one of them)")
        elif roles == ["standard"]:
            concs = sorted({r.concentration for r in rs if r.concentration is not None})
            if len(concs) > 1:
                lines = ", ".join(str(r.line) for r in rs)
                problems.append(f"lines {lines}: standard {name!r} has concentrations "
                                f"{', '.join(f'{c:g}' for c in concs)}; give each level its "
                                "own sample name")
    std_levels = {r.concentration for r in rows if r.role == "standard"}
    if rows and len(std_levels) < 2:
        problems.append(f"the manifest has standards at {len(std_levels)} concentration"
                        f"{'s' if len(std_levels) != 1 else ''}; a calibration needs at least "
                        "two different concentrations")
    return problems


def _spot_file_problems(rows: Sequence[ManifestRow]) -> list[str]:
    """Spot files must be valid and hold every spot number the rows name."""
    from .spots import load_spots

    problems: list[str] = []
    numbers: dict[Path, set[int] | None] = {}
    for r in rows:
        if r.spots_file is None:
            continue
        if r.spots_file not in numbers:
            try:
                numbers[r.spots_file] = set(load_spots(r.spots_file).numbers)
            except EclQuantError as err:
                numbers[r.spots_file] = None
                problems.append(f"line {r.line}: spots file {r.spots_file.name}: {err.reason}")
        have = numbers[r.spots_file]
        if have is not None and r.spots:
            missing = [n for n in r.spots if n not in have]
            if missing:
                problems.append(
                    f"line {r.line}: spot(s) {format_spot_list(tuple(missing))} not in the "
                    f"spots file {r.spots_file.name} (it has "
                    f"{format_spot_list(tuple(sorted(have))) or 'no spots'})")
    return problems


def _group_recordings(rows: Sequence[ManifestRow], problems: list[str]) -> tuple[RecordingSpec, ...]:
    groups: dict[Path, list[ManifestRow]] = {}
    for r in rows:
        groups.setdefault(r.path, []).append(r)
    used: set[str] = set()
    specs: list[RecordingSpec] = []
    for rpath, rs in groups.items():
        lines = ", ".join(str(r.line) for r in rs)
        for attr in ("dark", "spots_file", "channel", "transfer", "exposure_s", "noise_from"):
            vals = {getattr(r, attr) for r in rs}
            if len(vals) > 1:
                col = "spots" if attr == "spots_file" else attr
                problems.append(f"lines {lines}: recording {rs[0].path_text!r} has different "
                                f"{col} values; rows of one recording must agree on {col}")
        if len(rs) > 1 and any(r.spots is None for r in rs):
            problems.append(f"lines {lines}: recording {rs[0].path_text!r} appears in several "
                            "rows but at least one leaves spot empty (= all spots); give each "
                            "row its spot numbers")
        seen: dict[int, int] = {}
        for r in rs:
            for s in r.spots or ():
                if s in seen:
                    problems.append(f"lines {seen[s]}, {r.line}: spot {s} of recording "
                                    f"{r.path_text!r} is assigned twice")
                else:
                    seen[s] = r.line
        first = rs[0]
        specs.append(RecordingSpec(
            rec_id=_rec_id(first.path_text, used), path=rpath, path_text=first.path_text,
            dark=first.dark, spots_file=first.spots_file, channel=first.channel,
            transfer=first.transfer, lines=tuple(r.line for r in rs),
            exposure_s=first.exposure_s, noise_from=first.noise_from))
    return tuple(specs)


# ------------------------------------------------------------------ cache keys

#: Bump when the layout or meaning of a recording's cached outputs changes.
CACHE_SCHEMA = 1


def content_digest(path: str | Path) -> str:
    """SHA-256 of a file, or of a folder's files (names and contents, sorted).

    Hidden files (names starting with ``.``) inside a folder are ignored.
    """
    p = Path(path)
    if p.is_dir():
        h = hashlib.sha256()
        for child in sorted(p.rglob("*")):
            rel = child.relative_to(p)
            if any(part.startswith(".") for part in rel.parts) or not child.is_file():
                continue
            # surrogateescape: file names that are not UTF-8 hash as their raw bytes.
            name = rel.as_posix().encode("utf-8", "surrogateescape")
            h.update(name + b"\0" + sha256_file(child).encode() + b"\n")
        return h.hexdigest()
    try:
        return sha256_file(p)
    except OSError as err:
        raise InputFormatError(f"cannot read ({err.strerror})", path=p) from err


def recording_key(path: str | Path, *, parameters: Mapping[str, Any],
                  extra_files: Mapping[str, str | Path | None] | None = None) -> str:
    """Cache key of one recording: SHA-256 over its content and every parameter.

    Parameters
    ----------
    path : str or Path
        The recording (file or folder).
    parameters : mapping
        Everything that changes the measurement (settings, software version); must be
        JSON serialisable (other objects are turned into their ``str``).
    extra_files : mapping of name -> path or None
        Other inputs whose content matters (dark frames, spot file, device profile).

    Returns
    -------
    str
        64 hex digits.
    """
    doc = {
        "schema": CACHE_SCHEMA,
        "recording": content_digest(path),
        "files": {k: (None if v is None else content_digest(v))
                  for k, v in sorted((extra_files or {}).items())},
        "parameters": parameters,
    }
    blob = json.dumps(doc, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()


# ------------------------------------------------------------------ output lock

LOCK_NAME = ".ecl-quant.lock"


def _proc_start_ticks(pid: int) -> str | None:
    """Start time of a process (Linux /proc), to tell a reused pid from the original."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return stat.rsplit(")", 1)[-1].split()[19]


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


class OutputLock:
    """Exclusive lock on an output folder, held for the duration of a batch.

    The lock is the file ``DIR/.ecl-quant.lock``: an advisory ``flock`` on it (released
    by the kernel when the holder dies, even by SIGKILL) plus the holder's pid, host and
    start time, used for the message and, where ``flock`` is missing, to detect a stale
    lock (the pid no longer runs on this host).

    Examples
    --------
    >>> with OutputLock(out_dir):          # doctest: +SKIP
    ...     write_results(out_dir)
    """

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self._fd: int | None = None
        self.took_over: dict[str, Any] | None = None

    # -- helpers
    def _info(self) -> dict[str, Any]:
        return {"pid": os.getpid(), "host": socket.gethostname(),
                "proc_start": _proc_start_ticks(os.getpid()),
                "started": datetime.now(timezone.utc).isoformat(timespec="seconds")}

    def _read_holder(self) -> dict[str, Any]:
        try:
            return dict(json.loads(self.path.read_text(encoding="utf-8")))
        except (OSError, ValueError, TypeError):
            return {}

    def _busy(self, holder: Mapping[str, Any]) -> OutputError:
        who = (f"pid {holder.get('pid')} on {holder.get('host')}, started "
               f"{holder.get('started')}" if holder else "another process")
        return OutputError(
            f"another batch ({who}) is writing to this folder; wait for it to finish or "
            f"choose another --out (if no batch is running, delete {LOCK_NAME})",
            path=self.folder)

    def _is_stale(self, holder: Mapping[str, Any]) -> bool:
        if not holder:
            # Empty or unreadable: a holder may be writing it this instant; stale if old.
            try:
                return time.time() - self.path.stat().st_mtime > 30
            except OSError:
                return True
        if holder.get("host") != socket.gethostname():
            return False
        pid = int(holder.get("pid", -1))
        if not _pid_alive(pid):
            return True
        start = holder.get("proc_start")
        now_start = _proc_start_ticks(pid)
        return start is not None and now_start is not None and start != now_start

    def _write_info(self, fd: int) -> None:
        os.ftruncate(fd, 0)
        os.lseek(fd, 0, os.SEEK_SET)
        os.write(fd, (json.dumps(self._info()) + "\n").encode("utf-8"))
        os.fsync(fd)

    def _write_info_or_close(self, fd: int) -> None:
        try:
            self._write_info(fd)
        except OSError as err:  # disk full, quota, I/O error: give the lock back
            os.close(fd)
            with contextlib.suppress(OSError):
                os.unlink(self.path)
            raise OutputError(f"cannot write the lock file ({err.strerror or err}); free "
                              "some space or choose another --out", path=self.path) from err

    # -- public
    def acquire(self) -> OutputLock:
        """Take the lock.

        Raises
        ------
        OutputError
            When another live batch holds it (the message names its pid and host).
        """
        try:
            import fcntl
        except ImportError:  # pragma: no cover - not POSIX
            return self._acquire_by_pid()
        for _attempt in range(20):
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as err:
                raise OutputError(f"cannot create the lock file ({err.strerror})",
                                  path=self.path) from err
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                os.close(fd)
                raise self._busy(self._read_holder()) from None
            try:  # the file may have been unlinked by the previous holder meanwhile
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if not same:
                os.close(fd)
                continue
            holder = self._read_holder()
            if holder and int(holder.get("pid", -1)) != os.getpid():
                if not self._is_stale(holder):
                    # flock is free but a live process claims the folder: flock may not
                    # work on this file system; respect the pid.
                    os.close(fd)
                    raise self._busy(holder)
                self.took_over = holder
            self._write_info_or_close(fd)
            self._fd = fd
            return self
        raise self._busy(self._read_holder())  # pragma: no cover - pathological churn

    def _acquire_by_pid(self) -> OutputLock:  # pragma: no cover - exercised off POSIX
        for _attempt in range(3):
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o644)
            except FileExistsError:
                holder = self._read_holder()
                if not self._is_stale(holder):
                    raise self._busy(holder) from None
                self.took_over = holder
                try:
                    os.unlink(self.path)
                except FileNotFoundError:
                    pass
                continue
            self._write_info_or_close(fd)
            self._fd = fd
            return self
        raise self._busy(self._read_holder())

    def release(self) -> None:
        """Give the lock back (removes the lock file)."""
        if self._fd is None:
            return
        try:
            os.unlink(self.path)
        except OSError:
            pass
        try:
            os.close(self._fd)
        finally:
            self._fd = None

    @property
    def held(self) -> bool:
        """Whether this object holds the lock."""
        return self._fd is not None

    def __enter__(self) -> OutputLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


# ------------------------------------------------------------------ execution layer


def _worker_count(workers: int | None, n_items: int) -> int:
    if workers is None:
        workers = os.cpu_count() or 1
    if workers < 1:
        raise InputFormatError(f"--workers {workers}: give 1 or more")
    return max(1, min(workers, n_items))


def iter_completed(func: Callable[[Any], Any], items: Sequence[Any], *,
                   workers: int | None = None, dask: str | Any | None = None,
                   ) -> Iterator[tuple[int, Any, BaseException | None]]:
    """Run ``func`` on every item and yield ``(index, result, error)`` as each finishes.

    Parameters
    ----------
    func : callable
        A module-level (picklable) function of one argument.
    items : sequence
        Picklable arguments.
    workers : int or None
        Local execution: 1 runs in this process, in order; more uses a process pool of
        that size; None uses one process per CPU. Ignored when ``dask`` is given.
    dask : str or distributed.Client or None
        Scheduler address (``tcp://host:8786``) or a connected client: run the items as
        dask.distributed tasks. Workers must see the same file system paths. Prefer
        worker processes with one thread each: the batch worker records warnings with
        ``warnings.catch_warnings``, which is not thread-safe before Python 3.14.

    Notes
    -----
    The local pool starts workers with ``forkserver`` (``spawn`` elsewhere): a script
    that calls this with ``workers > 1`` needs the usual
    ``if __name__ == "__main__":`` guard.

    Yields
    ------
    (int, object, BaseException or None)
        Index into ``items``, ``func``'s return value (None on error) and the exception
        ``func`` raised (or the pool's error when a worker process died).

    Raises
    ------
    ClusterError
        When the scheduler cannot be reached.
    """
    n = len(items)
    if n == 0:
        return
    if dask is not None:
        yield from _iter_dask(func, items, dask)
        return
    nw = _worker_count(workers, n)
    if nw == 1:
        for i, item in enumerate(items):
            try:
                yield i, func(item), None
            except Exception as err:  # reported per item; the batch goes on
                yield i, None, err
        return
    yield from _iter_pool(func, items, nw)


def _pool_context() -> Any:
    import multiprocessing as mp

    methods = mp.get_all_start_methods()
    # forkserver/spawn: a clean child, safe when the parent runs threads (dask, tqdm).
    ctx = mp.get_context("forkserver" if "forkserver" in methods else "spawn")
    if ctx.get_start_method() == "forkserver":
        # Imported once in the server, shared by every forked worker (each would
        # otherwise pay seconds of imports itself). None of these starts a thread on
        # import; a module that fails to import is skipped by multiprocessing.
        ctx.set_forkserver_preload(list(_WORKER_PRELOAD))
    return ctx


_WORKER_PRELOAD = ("ecl_quant.batch", "ecl_quant.measure", "ecl_quant.radiometry",
                   "ecl_quant.calibration", "ecl_quant.report", "av", "PIL.Image",
                   "PIL.JpegImagePlugin", "PIL.PngImagePlugin", "scipy.ndimage",
                   "scipy.signal", "scipy.fft", "scipy.stats", "matplotlib.figure",
                   "matplotlib.backends.backend_agg", "matplotlib.patches")


def _worker_setup() -> None:
    """Pool initializer when the workers fill the cores (see frames.use_one_core)."""
    from .frames import use_one_core

    use_one_core()


def _iter_pool(func: Callable[[Any], Any], items: Sequence[Any],
               n_workers: int) -> Iterator[tuple[int, Any, BaseException | None]]:
    from concurrent.futures import ProcessPoolExecutor, as_completed

    # As many workers as cores (or more): each decodes in its own thread only.
    busy = n_workers >= (os.cpu_count() or 1)
    pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=_pool_context(),
                               initializer=_worker_setup if busy else None)
    try:
        futures = {pool.submit(func, item): i for i, item in enumerate(items)}
        for fut in as_completed(futures):
            i = futures[fut]
            try:
                yield i, fut.result(), None
            except Exception as err:  # includes BrokenProcessPool when a worker died
                yield i, None, err
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _iter_dask(func: Callable[[Any], Any], items: Sequence[Any],
               dask: str | Any) -> Iterator[tuple[int, Any, BaseException | None]]:
    try:
        from distributed import Client, as_completed
    except ImportError as err:  # pragma: no cover - optional dependency
        raise ClusterError("--dask needs the dask.distributed package: "
                           "pip install 'ecl_quant[dask]'") from err
    own = isinstance(dask, str)
    if own:
        try:
            client = Client(dask, timeout=15, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as err:
            raise ClusterError(f"cannot reach the dask scheduler at {dask} ({err}); check the "
                               "address or run without --dask") from err
    else:
        client = dask
    try:
        token = hashlib.sha256(f"{os.getpid()}-{time.time_ns()}".encode()).hexdigest()[:12]
        futures = [client.submit(func, item, key=f"ecl-quant-{token}-{i}", pure=False)
                   for i, item in enumerate(items)]
        index = {f.key: i for i, f in enumerate(futures)}
        for fut in as_completed(futures, loop=client.loop):
            i = index[fut.key]
            try:
                yield i, fut.result(), None
            except Exception as err:
                yield i, None, err
            finally:
                fut.release()
    finally:
        if own:
            client.close()


# ------------------------------------------------------------------ flags and cautions

#: Shown at the top of every report and printed after every batch.
CAUTIONS = (
    "Results are research measurements, not a certified analytical method.",
    "Decisions about drinking water, food or health must rest on accredited laboratory "
    "methods and on the local regulations and codes.",
    "Reagents used in ECL (luminophores, strong oxidants, amine co-reactants) are "
    "hazardous: follow their safety data sheets and local rules.",
)

#: Field QC flags of a recording and what each one means.
QC_FLAGS: dict[str, str] = {
    "saturated": "Some spot pixels reached the top code in at least one frame, so light was "
                 "lost; those spots are left out of the calibration and the results. Lower "
                 "the exposure or ISO, or dilute the sample.",
    "drifted": "The card moved by more than the drift limit during the recording (hand "
               "tremor). Frames were registered before integration; check the overlay.",
    "exposure_changed": "The exposure changed during the recording (auto-exposure), which "
                        "breaks integration over time. Lock exposure and ISO on the camera.",
    "ambient_light": "The scene outside the spots is bright (light leaking into the dark "
                     "box); background subtraction takes it out but the noise goes up. "
                     "Shield the card from room light.",
    "blurred": "The spot edges are soft (low variance of the Laplacian on the spot "
               "projection): the camera was out of focus or moved within an exposure. "
               "Refocus and hold the camera still.",
    "low_snr": "A spot's signal-to-noise ratio is below the limit; its reading is noisy.",
    "pulse_not_ended": "The recording ended while a spot still glowed at more than a tenth "
                       "of its peak: its integral misses the end of the pulse and reads "
                       "low. Record until the emission has faded.",
    "no_pulse": "No ECL pulse was detected on a spot (expected for blanks and zero "
                "standards).",
}

#: Flags of a quantified result.
RESULT_FLAGS: dict[str, str] = {
    "below_lod": "The concentration is below the limit of detection: report it as "
                 "\"not detected\" (below LOD), not as a number.",
    "below_loq": "Between the limits of detection and quantification: detected, but the "
                 "number is not precise enough to quantify.",
    "above_range": "The reading is above the highest standard: the calibration is not "
                   "known to hold there; dilute the sample and measure again.",
    "extrapolated": "The reading lies outside the span of the standards: the value is an "
                    "extrapolation of the calibration.",
    "no_solution": "The calibration curve never reaches this reading, so no concentration "
                   "can be given.",
    "replicate_excluded": "Some replicate spots of this sample were left out (saturated); "
                          "the result uses the others.",
    "no_valid_reading": "Every spot of this sample was left out (saturated or not "
                        "measured), so there is nothing to quantify.",
}


@dataclass(frozen=True)
class QCLimits:
    """Limits of the field QC flags.

    Attributes
    ----------
    drift_limit_px : float
        ``drifted`` when the card moves more than this (largest shift from the first
        frame), px.
    ambient_limit : float
        ``ambient_light`` when the median linear level around the spots is above this
        fraction of full scale (per frame).
    blur_limit : float
        ``blurred`` when the spot sharpness score (:func:`spot_sharpness`: variance of the
        Laplacian of the contrast-normalised spot projection, times the radius) is below
        this; 0.010 is a logistic edge scale of about 1 px (10-90 % edge width 4.4 px).
    min_snr : float
        ``low_snr`` for spots of standards above zero and of unknowns below this SNR.
    """

    drift_limit_px: float = 2.5
    ambient_limit: float = 0.10
    blur_limit: float = 0.010
    min_snr: float = 5.0


def software_versions() -> dict[str, str]:
    """Versions of Python, ecl_quant and the libraries that shape the numbers."""
    from importlib import metadata

    from . import __version__

    out = {"ecl_quant": __version__, "python": sys.version.split()[0]}
    for dist in ("numpy", "scipy", "pandas", "opencv-python-headless", "av", "Pillow",
                 "scikit-image", "matplotlib", "statsmodels", "dask", "distributed"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            continue
    return out


# ------------------------------------------------------------------ settings and results

RESPONSES = ("integral", "peak")
_RESPONSE_SE = {"integral": "integral_se", "peak": "peak_se"}
MARKER_NAME = ".ecl-quant-batch"
RECORDINGS_DIR = "recordings"
_FLAG_ORDER = ("saturated", "drifted", "exposure_changed", "ambient_light", "blurred",
               "pulse_not_ended", "low_snr", "no_pulse")


@dataclass(frozen=True)
class BatchSettings:
    """Options of a batch run (the ``batch`` subcommand's flags).

    Attributes
    ----------
    out_dir : Path
        Output folder.
    workers : int or None
        Local processes (1 = in this process); None = one per CPU.
    dask : str or None
        dask.distributed scheduler address; replaces the local pool.
    model : str
        Calibration model (see :func:`ecl_quant.calibration.fit_calibration`).
    response : {"integral", "peak"}
        Figure of merit calibrated against concentration.
    units : str
        Concentration units of the manifest (labels only).
    level : float
        Confidence level of intervals and bands.
    force : bool
        Measure every recording again, ignoring the cache.
    channel, transfer : str
        Defaults for rows without their own.
    allow_outside : bool
        Accept paths outside the manifest's folder.
    weights : str or None
        Calibration weights (None, "1/x2", "1/y2", "1/var").
    qc : QCLimits
    measure_options : dict
        Further MeasureSettings fields, the same for every recording.
    progress : bool
        Progress bar and status lines on stderr.
    """

    out_dir: Path
    workers: int | None = None
    dask: str | None = None
    model: str = "linear"
    response: str = "integral"
    units: str = "umol/L"
    level: float = 0.95
    force: bool = False
    channel: str = "red"
    transfer: str = "auto"
    allow_outside: bool = False
    weights: str | None = None
    qc: QCLimits = field(default_factory=QCLimits)
    measure_options: Mapping[str, Any] = field(default_factory=dict)
    progress: bool = True

    def __post_init__(self) -> None:
        object.__setattr__(self, "out_dir", Path(self.out_dir))
        object.__setattr__(self, "measure_options", dict(self.measure_options))
        if self.response not in RESPONSES:
            raise InputFormatError(f"--response {self.response!r}: use integral or peak")
        if not 0.5 <= self.level < 1:
            raise InputFormatError(f"--level {self.level:g}: give a level in [0.5, 1), e.g. 0.95")
        if self.channel not in CHANNELS:
            raise InputFormatError(f"--channel {self.channel!r}: use one of {', '.join(CHANNELS)}")
        spec = parse_transfer(self.transfer)
        if spec.kind == "profile":  # relative to the working folder; made absolute here
            prof = Path(spec.profile_path or "").expanduser().resolve()
            if not prof.is_file():
                raise InputFormatError("device profile not found; check the --transfer "
                                       "profile= path", path=prof)
            object.__setattr__(self, "transfer", f"profile={prof}")
        if self.workers is not None and self.workers < 1:
            raise InputFormatError(f"--workers {self.workers}: give 1 or more")


@dataclass(frozen=True)
class RecordingOutcome:
    """What happened to one recording.

    Attributes
    ----------
    rec_id, path_text : str
    status : {"measured", "cached", "failed"}
    key : str or None
        Cache key (SHA-256 of the inputs and parameters).
    elapsed_s : float
    error : str or None
        Exception class name when failed.
    message : str or None
    detail : str
        Traceback text when failed (shown with --debug).
    warnings : tuple of str
    """

    rec_id: str
    path_text: str
    status: str
    key: str | None = None
    elapsed_s: float = 0.0
    error: str | None = None
    message: str | None = None
    detail: str = ""
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class BatchResult:
    """Outcome of :func:`run_batch`.

    Attributes
    ----------
    out_dir : Path
    exit_code : int
        0 every recording measured and results written; 1 partial (some recordings or
        rows failed, listed in errors.csv); 2 no calibration could be made.
    outcomes : tuple of RecordingOutcome
        In manifest order.
    results : DataFrame
        results.csv.
    errors : DataFrame
        errors.csv.
    qc : DataFrame
        qc.csv.
    measurements : DataFrame
        measurements.csv.
    fatal : str or None
        Why no results could be made (exit code 2).
    provenance : dict
        batch.json.
    """

    out_dir: Path
    exit_code: int
    outcomes: tuple[RecordingOutcome, ...]
    results: Any
    errors: Any
    qc: Any
    measurements: Any
    fatal: str | None = None
    provenance: dict[str, Any] = field(default_factory=dict)

    def to_frame(self) -> Any:
        """The results table (pandas)."""
        return self.results

    @property
    def n_failed(self) -> int:
        """Recordings that could not be measured."""
        return sum(o.status == "failed" for o in self.outcomes)


# ------------------------------------------------------------------ the worker


@dataclass(frozen=True)
class _Job:
    rec_id: str
    path: str
    path_text: str
    dark: str | None
    spots_file: str | None
    channel: str
    transfer: str
    folder: str
    force: bool
    batch_id: str
    measure_options: Mapping[str, Any]


def _noise_options(path: Path) -> dict[str, Any]:
    """MeasureSettings options of a camera.json noise model (read variance, gain, source)."""
    from .radiometry import camera_noise_model

    read_var, gain, source = camera_noise_model(path)
    return {"read_var": read_var, "gain": gain, "noise_source": source}


def _row_measure_options(base: Mapping[str, Any], rec: RecordingSpec) -> dict[str, Any]:
    """The batch's measure options with a recording's own exposure and noise model."""
    out = dict(base)
    if rec.exposure_s is not None:
        out["exposure_s"] = rec.exposure_s
    if rec.noise_from is not None:
        out.update(_noise_options(rec.noise_from))
    return out


def _profile_path(transfer: str) -> str | None:
    spec = parse_transfer(transfer)
    return spec.profile_path if spec.kind == "profile" else None


def _key_parameters(job: _Job) -> dict[str, Any]:
    from . import __version__

    return {"ecl_quant": __version__, "channel": job.channel,
            "transfer": "profile" if _profile_path(job.transfer) else job.transfer,
            "measure_options": dict(job.measure_options)}


def _job_key(job: _Job) -> str:
    return recording_key(job.path, parameters=_key_parameters(job),
                         extra_files={"dark": job.dark, "spots": job.spots_file,
                                      "profile": _profile_path(job.transfer)})


def _cache_hit(folder: Path, key: str) -> bool:
    try:
        done = json.loads((folder / "done.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    if done.get("key") != key:
        return False
    return all((folder / name).is_file() for name in done.get("files", ()))


def _run_job(job: _Job) -> RecordingOutcome:
    """Measure one recording into its folder, or find it in the cache (runs in a worker)."""
    import traceback

    t0 = time.perf_counter()
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as records:
        warnings.simplefilter("always")
        try:
            key = _job_key(job)
            folder = Path(job.folder)
            if not job.force and _cache_hit(folder, key):
                return RecordingOutcome(job.rec_id, job.path_text, "cached", key=key,
                                        elapsed_s=time.perf_counter() - t0)
            _measure_into(job, key, folder)
            status = "measured"
        except Exception as err:  # every failure is reported; the batch goes on
            caught = _warning_texts(records)
            return RecordingOutcome(
                job.rec_id, job.path_text, "failed", elapsed_s=time.perf_counter() - t0,
                error=type(err).__name__,
                message=_failure_text(err, job), detail=traceback.format_exc(),
                warnings=tuple(caught))
        caught = _warning_texts(records)
    return RecordingOutcome(job.rec_id, job.path_text, status, key=key,
                            elapsed_s=time.perf_counter() - t0, warnings=tuple(caught))


def _failure_text(err: BaseException, job: _Job) -> str:
    """The error's message; a file other than the recording itself is named first."""
    if not isinstance(err, EclQuantError):
        return str(err) or repr(err)
    if err.path is None or Path(err.path).resolve() == Path(job.path).resolve():
        return err.reason
    try:  # a frame inside the recording's folder: name it relative to the folder
        where = Path(err.path).resolve().relative_to(Path(job.path).resolve()).as_posix()
    except ValueError:  # another input (dark frames, spot file, profile): its full path
        where = err.path
    return f"{where}: {err.reason}"


def _warning_texts(records: Iterable[warnings.WarningMessage]) -> list[str]:
    out: list[str] = []
    for w in records:
        text = f"{w.category.__name__}: {w.message}"
        if text not in out:
            out.append(text)
    return out


def _measure_into(job: _Job, key: str, folder: Path) -> None:
    """Measure, write the outputs into a temporary folder, then swap it into place."""
    import shutil

    token = hashlib.sha256(f"{os.getpid()}-{time.time_ns()}".encode()).hexdigest()[:8]
    tmp = folder.parent / f".{folder.name}.partial-{os.getpid()}-{token}"
    old = folder.parent / f".{folder.name}.old-{os.getpid()}-{token}"
    tmp.mkdir(parents=True)
    try:
        # Opened once for measure and the QC's ambient level (a folder's headers or a
        # video's index are read once).
        rec = _open_job_recording(job)
        result = _measure_recording(job, rec)
        files = _write_recording_outputs(result, tmp)
        qc = recording_qc_metrics(result, source=rec, channel=job.channel,
                                  transfer=job.transfer)
        _write_json(tmp / "qc.json", qc)
        files.append("qc.json")
        _write_json(tmp / "done.json", {
            "key": key, "recording": job.rec_id, "path": job.path_text,
            "parameters": _key_parameters(job), "files": sorted(files),
            "batch_id": job.batch_id,
            "measured_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        })
        if folder.exists():
            os.rename(folder, old)
        os.rename(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    shutil.rmtree(old, ignore_errors=True)


def _write_json(path: Path, obj: Any) -> None:
    from ._io import write_json_atomic

    write_json_atomic(path, obj)


# ------------------------------------------------------------------ the batch


def _prepare_out_dir(out: Path, *, force: bool) -> None:
    from ._io import ensure_dir

    if out.exists() and not out.is_dir():
        raise OutputError("--out is a file; give a folder", path=out)
    if out.is_dir() and not (out / MARKER_NAME).exists():
        visible = [p for p in out.iterdir() if not p.name.startswith(".")]
        if visible and not force:
            raise OutputError(
                "folder holds files that are not from a batch; choose an empty or new --out "
                "folder, or pass --force to write into it", path=out)
    ensure_dir(out)
    ensure_dir(out / RECORDINGS_DIR)


def _clean_partials(rec_root: Path) -> None:
    import shutil

    for p in rec_root.glob(".*"):
        if ".partial-" in p.name or ".old-" in p.name:
            shutil.rmtree(p, ignore_errors=True)


def run_batch(manifest: str | Path | Manifest, settings: BatchSettings, *,
              finalize: Callable[[Path], Any] | None = None,
              client: Any | None = None,
              status: Callable[[str], None] | None = None) -> BatchResult:
    """Measure every recording of a manifest, calibrate, quantify; write the outputs.

    Parameters
    ----------
    manifest : str, Path or Manifest
        The manifest CSV (validated completely before any work) or a validated one.
    settings : BatchSettings
    finalize : callable, optional
        Called with the output folder at the end while the folder is still locked
        (the CLI writes report.html here).
    client : distributed.Client, optional
        A connected dask client to use instead of ``settings.dask``.
    status : callable, optional
        Receives one line per recording as it finishes (default: stderr via tqdm when
        ``settings.progress``).

    Returns
    -------
    BatchResult
        ``exit_code`` 0 (all fine), 1 (partial: see errors.csv) or 2 (no calibration).

    Raises
    ------
    ManifestError
        When the manifest has problems (nothing is run).
    OutputError
        When the output folder is locked by another batch or not writable.
    """
    from ._io import write_text_atomic

    man = manifest if isinstance(manifest, Manifest) else read_manifest(
        manifest, allow_outside=settings.allow_outside)
    out = settings.out_dir.expanduser().resolve()
    _prepare_out_dir(out, force=settings.force)
    rec_root = out / RECORDINGS_DIR
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    batch_id = hashlib.sha256(f"{os.getpid()}-{time.time_ns()}".encode()).hexdigest()[:12]
    with OutputLock(out) as lock:
        write_text_atomic(out / MARKER_NAME, "ecl-quant batch output folder\n")
        _clean_partials(rec_root)
        if settings.force:
            _remove_unlisted(rec_root, {r.rec_id for r in man.recordings})
        jobs = [
            _Job(rec_id=r.rec_id, path=str(r.path), path_text=r.path_text,
                 dark=None if r.dark is None else str(r.dark),
                 spots_file=None if r.spots_file is None else str(r.spots_file),
                 channel=r.channel or settings.channel,
                 transfer=r.transfer or str(parse_transfer(settings.transfer)),
                 folder=str(rec_root / r.rec_id), force=settings.force, batch_id=batch_id,
                 measure_options=_row_measure_options(settings.measure_options, r))
            for r in man.recordings
        ]
        outcomes = _execute(jobs, settings, client=client, status=status)
        tables = _assemble(man, outcomes, rec_root, settings)
        cal, cal_error = _calibrate(tables["measurements"], settings, out)
        results = _quantify(tables, cal, settings)
        qc = _qc_with_results(tables, cal, settings)
        errors = tables["errors"]
        counts = {
            "recordings": len(outcomes),
            "measured_ok": sum(o.status != "failed" for o in outcomes),
            "measured_now": sum(o.status == "measured" for o in outcomes),
            "from_cache": sum(o.status == "cached" for o in outcomes),
            "failed": sum(o.status == "failed" for o in outcomes),
            "error_rows": len(errors),
            "unknowns": len(results),
        }
        exit_code = 2 if cal is None else (1 if len(errors) else 0)
        _write_csv(out / "measurements.csv", tables["measurements"])
        _write_csv(out / "qc.csv", qc)
        _write_csv(out / "results.csv", results)
        _write_csv(out / "errors.csv", errors)
        if cal is None and (out / "calibration.json").exists():
            (out / "calibration.json").unlink()
        profiles = sorted({p for j in jobs if (p := _profile_path(j.transfer))})
        provenance = {
            "manifest": str(man.path),
            "started": started,
            "finished": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "batch_id": batch_id,
            "parameters": {
                "units": settings.units, "level": settings.level, "model": settings.model,
                "response": settings.response, "weights": settings.weights,
                "channel": settings.channel, "transfer": settings.transfer,
                "allow_outside": settings.allow_outside, "force": settings.force,
                "execution": (f"dask {settings.dask}" if settings.dask else
                              "dask client" if client is not None else
                              f"local, {_worker_count(settings.workers, max(len(jobs), 1))} "
                              "worker(s)"),
            },
            "measure_settings": _measure_settings_doc(jobs),
            "qc_limits": dataclasses.asdict(settings.qc),
            "versions": software_versions(),
            "profiles": profiles,
            "counts": counts,
            "calibration_error": cal_error,
            "lock_taken_over": lock.took_over,
            "recordings": [
                dataclasses.asdict(o) | {
                    "detail": None, "channel": j.channel, "transfer": j.transfer,
                    "dark": j.dark, "spots_file": j.spots_file,
                    "exposure_s": j.measure_options.get("exposure_s")}
                for o, j in zip(outcomes, jobs)],
        }
        _write_json(out / "batch.json", provenance)
        if finalize is not None:
            finalize(out)
    return BatchResult(out_dir=out, exit_code=exit_code, outcomes=tuple(outcomes),
                       results=results, errors=errors, qc=qc,
                       measurements=tables["measurements"],
                       fatal=None if cal is not None else cal_error, provenance=provenance)


def _remove_unlisted(rec_root: Path, keep: set[str]) -> None:
    import shutil

    for p in rec_root.iterdir():
        if p.is_dir() and not p.name.startswith(".") and p.name not in keep:
            shutil.rmtree(p, ignore_errors=True)


def _write_csv(path: Path, df: Any) -> None:
    from ._io import atomic_write

    with atomic_write(path, "w") as fh:
        df.to_csv(fh, index=False, lineterminator="\n")


def _execute(jobs: Sequence[_Job], settings: BatchSettings, *, client: Any | None,
             status: Callable[[str], None] | None) -> list[RecordingOutcome]:
    from tqdm import tqdm

    n = len(jobs)
    outcomes: list[RecordingOutcome | None] = [None] * n
    bar = tqdm(total=n, desc="recordings", unit="rec", file=sys.stderr,
               disable=(not settings.progress) or None, leave=False, dynamic_ncols=True)

    def say(line: str) -> None:
        if status is not None:
            status(line)
        elif settings.progress:
            tqdm.write(line, file=sys.stderr)

    try:
        done = 0
        for i, res, err in iter_completed(_run_job, jobs, workers=settings.workers,
                                          dask=client if client is not None else settings.dask):
            job = jobs[i]
            if err is not None:  # the worker itself died (crash, killed, lost)
                res = RecordingOutcome(job.rec_id, job.path_text, "failed",
                                       error=type(err).__name__,
                                       message=f"worker failed: {err}" if str(err)
                                       else f"worker failed ({type(err).__name__})")
            outcomes[i] = res
            done += 1
            bar.update(1)
            text = {"measured": "measured", "cached": "cached  ", "failed": "FAILED  "}[res.status]
            line = f"[{done}/{n}] {text} {job.rec_id} ({res.elapsed_s:.1f} s)"
            if res.status == "failed":
                line += f": {res.error}: {res.message}"
            say(line)
            for w in res.warnings:
                say(f"        {job.rec_id}: {w}")
    finally:
        bar.close()
    return [o for o in outcomes if o is not None]


# ------------------------------------------------------------------ assembling tables

_MEAS_COLUMNS = ["recording", "path", "line", "sample", "role", "concentration", "spot",
                 "response", "response_se", "integral", "integral_se", "peak",
                 "time_to_peak_s", "snr", "saturated_frames", "used", "flags"]
_ERR_COLUMNS = ["recording", "path", "lines", "stage", "error", "message"]
_QC_COLUMNS = ["recording", "path", "kind", "n_frames", "n_spots", "max_drift_px",
               "blur_score", "ambient_fraction", "min_snr", "saturated_spots", "flags"]
_RESULT_COLUMNS = ["sample", "n", "response_mean", "concentration", "se", "ci_low", "ci_high",
                   "level", "units", "recordings", "flags"]


def _join_flags(*groups: Iterable[str]) -> str:
    words: list[str] = []
    for g in groups:
        for w in g:
            w = w.strip()
            if w and w not in words:
                words.append(w)
    known = [w for w in _FLAG_ORDER if w in words]
    return ";".join(known + [w for w in words if w not in _FLAG_ORDER])


def _split_flags(text: Any) -> list[str]:
    if text is None or (isinstance(text, float) and math.isnan(text)):
        return []
    return [w.strip() for w in str(text).replace(",", ";").split(";") if w.strip()]


def recording_flags(metrics: Mapping[str, Any], limits: QCLimits) -> list[str]:
    """Recording-level QC flags from the metrics in ``qc.json`` and the limits."""
    flags: list[str] = []

    def num(key: str) -> float:
        v = metrics.get(key)
        try:
            return float(v) if v is not None else math.nan
        except (TypeError, ValueError):
            return math.nan

    if num("max_drift_px") > limits.drift_limit_px:
        flags.append("drifted")
    if metrics.get("exposure_changed"):
        flags.append("exposure_changed")
    if num("ambient_fraction") > limits.ambient_limit:
        flags.append("ambient_light")
    if num("blur_score") < limits.blur_limit:
        flags.append("blurred")
    return flags


def _assemble(man: Manifest, outcomes: Sequence[RecordingOutcome], rec_root: Path,
              settings: BatchSettings) -> dict[str, Any]:
    import pandas as pd

    by_id = {o.rec_id: o for o in outcomes}
    meas: list[dict[str, Any]] = []
    qc_rows: list[dict[str, Any]] = []
    units: dict[str, Any] = {}
    errs: list[dict[str, Any]] = []
    resp_col = settings.response
    se_col = _RESPONSE_SE[resp_col]
    for rec in man.recordings:
        o = by_id[rec.rec_id]
        mrows = man.rows_of(rec)
        lines = ";".join(str(r.line) for r in mrows)
        if o.status == "failed":
            errs.append({"recording": rec.rec_id, "path": rec.path_text, "lines": lines,
                         "stage": "measure", "error": o.error, "message": o.message})
            continue
        folder = rec_root / rec.rec_id
        try:
            spots = pd.read_csv(folder / "spots.csv")
            metrics = json.loads((folder / "qc.json").read_text(encoding="utf-8"))
        except (OSError, ValueError) as err:
            errs.append({"recording": rec.rec_id, "path": rec.path_text, "lines": lines,
                         "stage": "read", "error": type(err).__name__,
                         "message": f"cannot read the recording's outputs ({err}); run again "
                                    "with --force"})
            continue
        available = [int(s) for s in spots["spot"]]
        if not available:
            errs.append({"recording": rec.rec_id, "path": rec.path_text, "lines": lines,
                         "stage": "spots", "error": "NoSpots",
                         "message": "no spot was found in this recording; check that the "
                                    "pulse is visible, or give a spots file"})
            continue
        missing = sorted({s for r in mrows for s in (r.spots or ()) if s not in available})
        if missing:
            errs.append({
                "recording": rec.rec_id, "path": rec.path_text, "lines": lines,
                "stage": "assign", "error": "SpotError",
                "message": f"the manifest names spot(s) {format_spot_list(tuple(missing))} but "
                           f"{len(available)} spot(s) were found "
                           f"({format_spot_list(tuple(available)) or 'none'}); the numbering "
                           "cannot be trusted: give a spots file for this recording"})
            continue
        units[rec.rec_id] = metrics.get("integral_unit")
        rec_flags = recording_flags(metrics, settings.qc)
        by_spot = {int(r["spot"]): r for r in spots.to_dict(orient="records")}
        rec_spot_flags: list[str] = []
        snrs: list[float] = []
        for row in mrows:
            for s in (row.spots or tuple(available)):
                sp = by_spot[s]
                zero = row.role == "blank" or (row.concentration == 0.0)
                own = _split_flags(sp.get("flags"))
                if zero:
                    own = [w for w in own if w not in ("low_snr", "no_pulse")]
                sat = int(_num(sp.get("saturated_frames"), 0)) > 0 or "saturated" in own
                if sat and "saturated" not in own:
                    own.append("saturated")
                snr = _num(sp.get("snr"))
                if not zero and math.isfinite(snr):
                    snrs.append(snr)
                    if snr < settings.qc.min_snr and "low_snr" not in own:
                        own.append("low_snr")
                response = _num(sp.get(resp_col))
                used = (not sat) and math.isfinite(response)
                rec_spot_flags.extend(own)
                meas.append({
                    "recording": rec.rec_id, "path": rec.path_text, "line": row.line,
                    "sample": row.sample, "role": row.role,
                    "concentration": row.concentration, "spot": s,
                    "response": response, "response_se": _num(sp.get(se_col)),
                    "integral": _num(sp.get("integral")),
                    "integral_se": _num(sp.get("integral_se")),
                    "peak": _num(sp.get("peak")),
                    "time_to_peak_s": _num(sp.get("time_to_peak_s")),
                    "snr": snr, "saturated_frames": int(_num(sp.get("saturated_frames"), 0)),
                    "used": used, "flags": _join_flags(own, rec_flags),
                })
        qc_rows.append({
            "recording": rec.rec_id, "path": rec.path_text, "kind": metrics.get("kind"), "n_frames": metrics.get("n_frames"),
            "n_spots": len(available), "max_drift_px": metrics.get("max_drift_px"),
            "blur_score": metrics.get("blur_score"),
            "ambient_fraction": metrics.get("ambient_fraction"),
            "min_snr": min(snrs) if snrs else math.nan,
            "saturated_spots": int(sum(int(_num(r.get("saturated_frames"), 0)) > 0
                                       for r in by_spot.values())),
            "flags": _join_flags(rec_flags, [w for w in rec_spot_flags if w != "no_pulse"]),
        })
    meas, qc_rows = _check_units(meas, qc_rows, units, errs, man)
    return {
        "measurements": pd.DataFrame(meas, columns=_MEAS_COLUMNS),
        "qc": pd.DataFrame(qc_rows, columns=_QC_COLUMNS),
        "errors": pd.DataFrame(errs, columns=_ERR_COLUMNS),
    }


def _check_units(meas: list[dict[str, Any]], qc_rows: list[dict[str, Any]],
                 units: Mapping[str, Any], errs: list[dict[str, Any]],
                 man: Manifest) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Drop recordings whose integrals are in other units than the standards' ones.

    A recording whose frames carry an exposure time is integrated per second of
    exposure (unit FS); one without (video) in FS x s unless ``exposure_s`` is given.
    Mixing them would put a factor of the exposure time into the results.
    """
    std_units = [units[m["recording"]] for m in meas if m["role"] != "unknown"]
    if not std_units:
        return meas, qc_rows
    ref = max(set(std_units), key=std_units.count)
    bad = {rid for rid, u in units.items() if u != ref}
    specs = {r.rec_id: r for r in man.recordings}
    for rid in sorted(bad, key=list(units).index):
        rec = specs[rid]
        errs.append({
            "recording": rid, "path": rec.path_text,
            "lines": ";".join(str(n) for n in rec.lines), "stage": "units",
            "error": "UnitMismatch",
            "message": f"its integrals are in {units[rid]} but the standards' are in {ref}: "
                       "its frames carry no exposure time (video) while the standards' do; "
                       "give its exposure time in the manifest's exposure_s column "
                       "(e.g. 1/30)" if ref == "FS" else
                       f"its integrals are in {units[rid]} but the standards' are in {ref}; "
                       "record standards and samples the same way or give exposure_s for "
                       "every recording"})
    return ([m for m in meas if m["recording"] not in bad],
            [q for q in qc_rows if q["recording"] not in bad])


def _num(value: Any, default: float = math.nan) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return default
    return v if math.isfinite(v) else default


# ------------------------------------------------------------------ summary text


def format_summary(result: BatchResult, *, units: str = "", level: float = 0.95) -> str:
    """A plain-text summary table of a batch for the terminal."""
    lines: list[str] = []
    c = result.provenance.get("counts", {})
    lines.append(f"recordings: {c.get('recordings', len(result.outcomes))}  measured now: "
                 f"{c.get('measured_now', 0)}  from cache: {c.get('from_cache', 0)}  "
                 f"failed: {c.get('failed', 0)}")
    res = result.results
    if res is not None and len(res):
        head = ("sample", f"conc. ({units})" if units else "conc.", "SE", f"{level:.0%} CI",
                "flags")
        body = []
        for r in res.to_dict(orient="records"):
            body.append((str(r["sample"]), _g(r.get("concentration")), _g(r.get("se")),
                         f"{_g(r.get('ci_low'))} .. {_g(r.get('ci_high'))}",
                         str(r.get("flags") or "") if not _isnan(r.get("flags")) else ""))
        widths = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(head)]
        fmt = "  ".join(f"{{:{'<' if i in (0, 4) else '>'}{w}}}" for i, w in enumerate(widths))
        lines.append(fmt.format(*head))
        lines.append(fmt.format(*("-" * w for w in widths)))
        lines.extend(fmt.format(*b) for b in body)
    errs = result.errors
    if errs is not None and len(errs):
        lines.append(f"{len(errs)} problem(s), listed in {result.out_dir / 'errors.csv'}:")
        for r in errs.to_dict(orient="records"):
            lines.append(f"  {r['recording']}: {r['stage']}: {r['error']}: {r['message']}")
    return "\n".join(lines)


def _isnan(v: Any) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def _g(v: Any) -> str:
    if _isnan(v):
        return "-"
    try:
        return f"{float(v):.4g}"
    except (TypeError, ValueError):
        return str(v)


# ------------------------------------------------------------------ calibration stage


def _calibrate(measurements: Any, settings: BatchSettings, out: Path) -> tuple[Any, str | None]:
    """Fit the calibration on the standards and blanks in use; write calibration.json."""
    from .calibration import calibrate_table, save_calibration

    m = measurements
    cal_df = m[m["used"].astype(bool) & m["role"].isin(["standard", "blank"])]
    if cal_df.empty:
        return None, "no standard or blank could be measured (see errors.csv)"
    try:
        cal = calibrate_table(
            cal_df.reset_index(drop=True), x="concentration", y="response", role="role",
            se="response_se", model=settings.model, weights=settings.weights,
            level=settings.level, units=settings.units,
            response_units=_RESPONSE_UNITS[settings.response])
    except EclQuantError as err:
        return None, err.reason
    save_calibration(cal, out / "calibration.json")
    return cal, None


_RESPONSE_UNITS = {"integral": "FS x s (spot integral)", "peak": "FS/s (spot peak)"}


def _quantify(tables: Mapping[str, Any], cal: Any, settings: BatchSettings) -> Any:
    """Concentrations of the unknowns (results.csv) with QC flags merged in."""
    import pandas as pd

    from .calibration import quantify_table

    m = tables["measurements"]
    unk = m[m["role"] == "unknown"]
    rows: list[dict[str, Any]] = []
    samples = list(dict.fromkeys(unk["sample"].tolist()))
    if cal is not None and len(unk):
        used = unk[unk["used"].astype(bool)].reset_index(drop=True)
        q = (quantify_table(used, cal, y="response", sample="sample", se="response_se",
                            level=settings.level) if len(used) else pd.DataFrame())
        by_sample = {str(r["sample"]): r for r in q.to_dict(orient="records")}
    else:
        by_sample = {}
    for s in samples:
        sm = unk[unk["sample"] == s]
        qc_flags = [w for f in sm.loc[sm["used"].astype(bool), "flags"]
                    for w in _split_flags(f) if w not in ("no_pulse",)]
        if (~sm["used"].astype(bool)).any() and sm["used"].astype(bool).any():
            qc_flags.append("replicate_excluded")
        recs = ";".join(dict.fromkeys(sm["recording"].tolist()))
        r = by_sample.get(str(s))
        if r is None:
            rows.append({"sample": s, "n": 0, "response_mean": math.nan,
                         "concentration": math.nan, "se": math.nan, "ci_low": math.nan,
                         "ci_high": math.nan, "level": settings.level, "units": settings.units,
                         "recordings": recs,
                         "flags": _join_flags(["no_valid_reading"] if cal is not None else [],
                                              qc_flags)})
            continue
        rows.append({"sample": s, "n": int(r["n"]), "response_mean": r["response_mean"],
                     "concentration": r["concentration"], "se": r["se"],
                     "ci_low": r["ci_low"], "ci_high": r["ci_high"], "level": r["level"],
                     "units": settings.units, "recordings": recs,
                     "flags": _join_flags(_split_flags(r.get("flags")), qc_flags)})
    return pd.DataFrame(rows, columns=_RESULT_COLUMNS)


def _qc_with_results(tables: Mapping[str, Any], cal: Any, settings: BatchSettings) -> Any:
    """qc.csv: add below_lod / above_range per recording from its own unknown readings."""
    from .calibration import quantify_table

    qc = tables["qc"].copy()
    m = tables["measurements"]
    if cal is None or qc.empty:
        return qc
    unk = m[(m["role"] == "unknown") & m["used"].astype(bool)].copy()
    if unk.empty:
        return qc
    unk["group"] = unk["recording"] + "\x1f" + unk["sample"].astype(str)
    q = quantify_table(unk.reset_index(drop=True), cal, y="response", sample="group",
                       se="response_se", level=settings.level)
    extra: dict[str, list[str]] = {}
    for r in q.to_dict(orient="records"):
        rec = str(r["sample"]).split("\x1f", 1)[0]
        words = [w for w in _split_flags(r.get("flags")) if w in ("below_lod", "above_range")]
        extra.setdefault(rec, []).extend(words)
    qc["flags"] = [_join_flags(_split_flags(f), extra.get(rec, []))
                   for rec, f in zip(qc["recording"], qc["flags"])]
    return qc


def _measure_settings_doc(jobs: Sequence[_Job]) -> dict[str, Any]:
    if not jobs:
        return {}
    try:
        doc = dataclasses.asdict(_make_settings(jobs[0]))
    except Exception:  # noqa: BLE001 - provenance only
        doc = dict(jobs[0].measure_options)
    doc.pop("channel", None)
    doc.pop("transfer", None)
    return {k: (str(v) if not isinstance(v, (int, float, str, bool, type(None), list, dict))
                else v) for k, v in doc.items()}


# ------------------------------------------------------------------ field QC metrics


def spot_sharpness(image: Any, spots: Iterable[tuple[float, float, float]], *,
                   n_brightest: int = 3, smooth_px: float = 1.0) -> float:
    """Sharpness of spot edges: variance of the Laplacian on the spot projection.

    The image is median filtered (3 x 3: isolated hot pixels) and smoothed with a
    Gaussian of ``smooth_px`` first, so that pixel noise and JPEG blocks do not count as
    edges. Each spot's half-maximum radius R is measured
    on the image itself (area above half its contrast), so the score does not depend on
    whether ``radius_px`` is the spot or a larger aperture. A box of +-(1.6 R + 2) px is
    normalised to the spot contrast (core median minus the median of the ring beyond
    1.25 R), the 4-neighbour Laplacian is taken (OpenCV), and its variance, less the
    variance it has on the ring alone, is multiplied by R. Spots fainter than 20 times
    the pixel noise (robust SD from the Laplacian on the ring) are skipped: their
    Laplacian is noise. The median over the ``n_brightest`` brightest spots is returned.

    For the simulator's logistic spot edge (R = 6 or 13 px, noiseless) the score is
    about 0.03 at an edge scale of 0.45 px, 0.014 at 0.8 px, 0.010 at 1 px and 0.004 at
    1.5 px; NaN when no spot is bright enough.

    Parameters
    ----------
    image : (H, W) ndarray
        Projection of the recording (sum or max over time), linear; NaN where not
        computed.
    spots : iterable of (x_px, y_px, radius_px)
        Centres and an approximate radius (spot or aperture).
    n_brightest : int
    smooth_px : float
        Gaussian sigma applied before the Laplacian, px (0: none).

    Returns
    -------
    float

    References
    ----------
    Pech-Pacheco, Cristobal, Chamorro-Martinez, Fernandez-Valdivia, "Diatom autofocusing
    in brightfield microscopy: a comparative study", ICPR 2000 (variance of the
    Laplacian as a focus measure).
    """
    import cv2
    import numpy as np

    raw = np.asarray(image, dtype=np.float32)
    img = cv2.medianBlur(raw, 3)  # isolated hot pixels are not edges
    if smooth_px > 0:
        img = cv2.GaussianBlur(img, (0, 0), float(smooth_px))
    scored: list[tuple[float, float]] = []
    for x, y, r in spots:
        if not (r > 1 and math.isfinite(x) and math.isfinite(y)):
            continue
        first = _normalised_box(img, raw, x, y, r)
        if first is None:
            continue
        z, rho, _contrast = first
        r_half = math.sqrt(float((z[rho < 1.25 * r] > 0.5).sum()) / math.pi)
        if r_half < 1.5:
            continue
        second = _normalised_box(img, raw, x, y, r_half)
        if second is None:
            continue
        scored.append((second[2], _laplacian_score(*second[:2], r_half)))
    if not scored:
        return math.nan
    scored.sort(reverse=True)
    return float(np.median([s for _c, s in scored[:n_brightest]]))


#: A spot is used for the sharpness score only when its contrast is at least this many
#: robust SDs of the ring around it.
_MIN_SHARPNESS_CONTRAST = 20.0


def _normalised_box(img: Any, raw: Any, x: float, y: float, r: float) -> Any:
    """(z, rho, contrast): the box +-(1.6 r + 2) of ``img`` around a spot, 0 = ring,
    1 = core; None when it leaves the frame, holds NaN, or the spot is too faint for
    the pixel noise of ``raw`` (the unsmoothed image)."""
    import numpy as np

    h, w = img.shape[:2]
    half = int(math.ceil(1.6 * r)) + 2
    xi, yi = int(round(x)), int(round(y))
    x0, x1, y0, y1 = xi - half, xi + half + 1, yi - half, yi + half + 1
    if x0 < 0 or y0 < 0 or x1 > w or y1 > h:
        return None
    crop = np.asarray(img[y0:y1, x0:x1], dtype=np.float32)
    if not np.isfinite(crop).all():
        return None
    yy, xx = np.mgrid[y0:y1, x0:x1]
    rho = np.hypot(xx - x, yy - y)
    ring, core = rho > 1.25 * r, rho < 0.5 * r
    if ring.sum() < 8 or core.sum() < 4:
        return None
    bg = float(np.median(crop[ring]))
    contrast = float(np.median(crop[core])) - bg
    # Pixel noise of the unsmoothed image from its Laplacian on the ring (a smooth tail
    # has almost none; the 4-neighbour kernel multiplies white-noise variance by 20),
    # robust (MAD) so that hot pixels do not count.
    import cv2

    raw_crop = np.asarray(raw[y0:y1, x0:x1], dtype=np.float32)
    if not np.isfinite(raw_crop).all():
        return None
    lap_ring = cv2.Laplacian(raw_crop, cv2.CV_32F, ksize=1)[1:-1, 1:-1][ring[1:-1, 1:-1]]
    noise = 1.4826 * float(np.median(np.abs(lap_ring - np.median(lap_ring)))) / math.sqrt(20)
    if not contrast > 0 or not contrast > _MIN_SHARPNESS_CONTRAST * noise:
        return None  # too faint: the Laplacian would measure noise, not the edge
    return (crop - bg) / contrast, rho, contrast


def _laplacian_score(z: Any, rho: Any, r: float) -> float:
    import cv2
    import numpy as np

    lap = cv2.Laplacian(z.astype("float32"), cv2.CV_32F, ksize=1)[1:-1, 1:-1]
    rho_in = rho[1:-1, 1:-1]
    ring = lap[rho_in > 1.25 * r + 2]
    # Robust (MAD) noise variance on the ring: a stray hot pixel there must not hide
    # the edge.
    noise = ((1.4826 * float(np.median(np.abs(ring - np.median(ring))))) ** 2
             if ring.size >= 8 else 0.0)
    return max(float(lap.var()) - noise, 0.0) * float(r)


def ambient_fraction(source: str | Path | Any, *, channel: str, transfer: str,
                     spots: Iterable[tuple[float, float, float]] = ()) -> float:
    """Median linear level of the first frame outside the spots, as a fraction of full
    scale (per frame, not per second).

    An ECL card is read in the dark: the first frame (before the pulse) shows card,
    dark offset and any room light leaking in. Spots (x, y, radius) are masked out.
    """
    import numpy as np

    from .frames import open_recording
    from .radiometry import linear_values

    rec = source if hasattr(source, "frames") else open_recording(source)
    frames = rec.frames()
    try:
        frame = next(frames, None)
    finally:
        frames.close()
    if frame is None:
        return math.nan
    lin = np.asarray(linear_values(frame, channel, transfer), dtype=np.float32)
    keep = np.ones(lin.shape, bool)
    yy, xx = np.ogrid[0:lin.shape[0], 0:lin.shape[1]]
    for x, y, r in spots:
        keep &= (xx - x) ** 2 + (yy - y) ** 2 > (1.5 * r) ** 2
    vals = lin[keep] if keep.any() else lin.ravel()
    return float(np.median(vals))


def recording_qc_metrics(result: Any, *, source: str | Path | Any, channel: str,
                         transfer: str) -> dict[str, Any]:
    """Field QC numbers of one measured recording (written to ``qc.json``).

    Parameters
    ----------
    result : MeasureResult
    source : str, Path or Recording
        The recording (its first frame is read again for the ambient level).
    channel, transfer : str

    Returns
    -------
    dict
        kind, n_frames, n_spots, max_drift_px (largest registration shift from the first
        frame), blur_score (:func:`spot_sharpness` on the max projection),
        ambient_fraction (:func:`ambient_fraction`), exposure_changed, saturated_spots.
    """
    import numpy as np

    prov = result.provenance or {}
    rec = prov.get("inputs", {}).get("recording", {})
    analysis = prov.get("analysis", {})
    ct = result.curves_table
    st = result.spots_table
    geometry = [(float(s.x_px), float(s.y_px), float(s.radius_px)) for s in result.spot_set]
    if len(ct):
        max_drift = float(np.nanmax(np.hypot(ct["shift_x_px"].to_numpy(float),
                                             ct["shift_y_px"].to_numpy(float))))
    else:
        max_drift = math.nan
    flags = [w for f in st["flags"] for w in _split_flags(f)] if len(st) else []
    saturated = [int(s) for s, n in zip(st["spot"], st["saturated_frames"])
                 if _num(n, 0) > 0] if len(st) else []
    return {
        "kind": rec.get("kind"),
        "n_frames": rec.get("n_frames"),
        "n_spots": len(st),
        "max_drift_px": max_drift,
        "blur_score": spot_sharpness(
            result.projection_sum if result.projection_sum is not None
            else result.projection_max, geometry),
        "blur_projection": "sum" if result.projection_sum is not None else "max",
        "ambient_fraction": ambient_fraction(source, channel=channel, transfer=transfer,
                                             spots=geometry),
        "exposure_changed": bool(analysis.get("exposure_changed")) or
                            "exposure_changed" in flags,
        "saturated_spots": saturated,
        "integral_unit": analysis.get("integral_unit"),
    }


# ------------------------------------------------------------------ measure adapters


def _make_settings(job: _Job) -> Any:
    from .measure import MeasureSettings

    return MeasureSettings(channel=job.channel, transfer=job.transfer,
                           **dict(job.measure_options))


def _open_job_recording(job: _Job) -> Any:
    """The job's recording, opened as measure would open it (read once, used twice)."""
    from .frames import open_recording

    settings = _make_settings(job)
    return open_recording(job.path, fps=settings.fps, max_pixels=settings.max_pixels)


def _measure_recording(job: _Job, rec: Any = None) -> Any:
    from .measure import measure

    return measure(job.path if rec is None else rec, spots=job.spots_file, dark=job.dark,
                   settings=_make_settings(job), progress=False)


def _write_recording_outputs(result: Any, folder: Path) -> list[str]:
    from .measure import write_measure_outputs

    return [Path(p).name for p in write_measure_outputs(result, folder, force=True)]
