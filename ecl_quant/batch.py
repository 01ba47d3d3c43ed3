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
    "transfer", "notes",
)
_REQUIRED = ("path", "sample", "role")
_ALIASES = {"spots_file": "spots", "spot_file": "spots", "roi": "spots", "rois": "spots",
            "comment": "notes", "note": "notes", "comments": "notes"}
#: Folder-name characters kept when naming a recording's output folder.
_ID_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


class ManifestError(InputFormatError):
    """The manifest has one or more problems; ``problems`` lists every one of them."""

    def __init__(self, problems: Sequence[str], *, path: str | Path | None = None) -> None:
        self.problems = tuple(problems)
        n = len(self.problems)
        head = f"{n} problem{'s' if n != 1 else ''} in the manifest; fix them and run again:"
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
    raw = Path(os.path.expanduser(text)) if text.startswith("~") else Path(text)
    resolved = (raw if raw.is_absolute() else base / raw).resolve()
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
    overrides), ``notes``. Blank lines and lines starting with ``#`` are skipped.

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
    for cells in reader:
        line = reader.line_num
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
        resolved: dict[str, Path | None] = {"dark": None, "spots": None}
        for col in ("dark", "spots"):
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
        if row_problems:
            problems.extend(row_problems)
            continue
        assert rpath is not None
        rows.append(ManifestRow(line=line, path=rpath, path_text=ptext, sample=sample, role=role,
                                concentration=conc, spots=spots, dark=resolved["dark"],
                                spots_file=resolved["spots"], channel=channel,
                                transfer=transfer, notes=rec.get("notes", "")))

    problems.extend(_cross_row_problems(rows))
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


def _group_recordings(rows: Sequence[ManifestRow], problems: list[str]) -> tuple[RecordingSpec, ...]:
    groups: dict[Path, list[ManifestRow]] = {}
    for r in rows:
        groups.setdefault(r.path, []).append(r)
    used: set[str] = set()
    specs: list[RecordingSpec] = []
    for rpath, rs in groups.items():
        lines = ", ".join(str(r.line) for r in rs)
        for attr in ("dark", "spots_file", "channel", "transfer"):
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
            transfer=first.transfer, lines=tuple(r.line for r in rs)))
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
            h.update(rel.as_posix().encode("utf-8") + b"\0" + sha256_file(child).encode() + b"\n")
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
            self._write_info(fd)
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
            self._write_info(fd)
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
        dask.distributed tasks. Workers must see the same file system paths.

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
        ctx.set_forkserver_preload(["ecl_quant.batch"])
    return ctx


def _iter_pool(func: Callable[[Any], Any], items: Sequence[Any],
               n_workers: int) -> Iterator[tuple[int, Any, BaseException | None]]:
    from concurrent.futures import ProcessPoolExecutor, as_completed

    pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=_pool_context())
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
        for fut in as_completed(futures):
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
