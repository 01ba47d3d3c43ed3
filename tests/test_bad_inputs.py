"""Bad inputs: every kind in tests/badcorpus.py fails clearly and loses nothing.

For each kind: the API raises the expected EclQuantError subclass with ``path`` naming the
file and a message that says what to do; the CLI prints one line on stderr and exits 2
(no traceback unless --debug); no temporary or half-written file is left behind and no
pre-existing file is changed. docs/bad_inputs.md is the table this corpus generates.

Outside references: the file formats are built by the corpus after their specifications
(PNG ISO/IEC 15948, Matroska RFC 9559, JPEG ITU-T T.81); exit codes and one-line errors on
stderr are common practice for Unix tools (sysexits-style 2 for bad usage/input).
"""

from __future__ import annotations

import ast
import os
import pickle
import re
import subprocess
import sys
from pathlib import Path

import pytest

import badcorpus as bc
from ecl_quant.cli import main
from ecl_quant.errors import EclQuantError

REPO = Path(__file__).resolve().parents[1]
CASES = {c.kind: c for c in bc.CASES}
REQUIRED_GROUPS = {"images", "videos", "spot files", "manifests", "calibration tables",
                   "calibration JSON", "outputs"}
# The kinds the issue names explicitly; each must be in the corpus.
REQUIRED_KINDS = {
    "image-zero-byte", "image-truncated-jpeg", "image-png-bad-crc", "video-text-as-mp4",
    "video-audio-only", "video-one-frame", "video-backwards-timestamps", "image-bomb",
    "image-mixed-sizes", "image-mixed-bit-depths", "image-tiff-as-dng", "image-jpeg-as-dng",
    "image-odd-names", "image-non-utf8-name-damaged", "spots-outside-frame",
    "manifest-missing-column", "manifest-conflicting-roles", "manifest-path-escape",
    "manifest-missing-file", "caltable-nan", "caltable-text", "caltable-negative",
    "caltable-constant-response", "caljson-hash-mismatch", "caljson-future-version",
    "caljson-extra-keys", "output-readonly-folder", "output-disk-full",
}


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    """Every case run once through the API (shared by the per-kind tests and the table)."""
    root = tmp_path_factory.mktemp("badcorpus")
    return root, bc.run_all(root)


def test_corpus_covers_the_required_kinds():
    assert len(bc.CASES) >= 30
    assert len(CASES) == len(bc.CASES), "kinds must be unique"
    assert REQUIRED_GROUPS <= {c.group for c in bc.CASES}
    assert REQUIRED_KINDS <= set(CASES), REQUIRED_KINDS - set(CASES)


def _ascii_name(path: Path) -> str:
    """The longest printable-ASCII run of a file name (survives any stderr encoding)."""
    runs = re.findall(r"[ -~]+", path.name)
    return max(runs, key=len) if runs else ""


# ------------------------------------------------------------------ API


@pytest.mark.parametrize("kind", list(CASES))
def test_api_raises_a_typed_error_naming_the_file(corpus, kind):
    root, outcomes = corpus
    case, out = CASES[kind], outcomes[kind]
    assert out.typed, f"{kind}: untyped {out.error}: {out.message}"
    assert not out.leftovers, f"{kind}: temporary files left behind: {out.leftovers}"
    assert not out.changed, f"{kind}: pre-existing file(s) changed: {out.changed}"
    if case.expect is None:
        assert out.error is None, f"{kind} must be accepted, got {out.error}: {out.message}"
        return
    err = out.exception
    assert isinstance(err, case.expect), f"{kind}: expected {case.expect.__name__}, got {out.error}"
    assert isinstance(err, EclQuantError)
    assert err.path, f"{kind}: the error does not name a file (path=None): {err}"
    assert str(err).startswith(err.path)
    # What is wrong, then what to do, separated by ';' or ':' (house style, STYLE.md rule 5).
    first = err.reason.splitlines()[0]
    own_words = re.sub(r"\([^()]*\)", "", first)  # drop quoted library details
    assert re.search(r"[;:] \S", own_words), f"{kind}: message gives no advice: {first!r}"


def test_valid_inputs_among_the_bad_are_read_correctly(corpus):
    _root, outcomes = corpus
    # Spaces and a non-UTF-8 byte in names do not matter; a one-frame video is measured
    # and its spot flagged: one frame holds no pulse to integrate.
    assert outcomes["image-odd-names"].message == "accepted: 2 frame(s) read, 32x24"
    msg = outcomes["video-one-frame"].message
    assert msg.startswith("accepted: 1 frame(s) measured") and "no_pulse" in msg


def test_path_escape_is_accepted_with_allow_outside(tmp_path):
    from ecl_quant.batch import read_manifest

    case = CASES["manifest-path-escape"]
    man = case.make(tmp_path)
    rows = read_manifest(man, allow_outside=True).rows
    assert [r.path.name for r in rows][-1] == "elsewhere.png"
    assert rows[-1].path == (tmp_path / "elsewhere.png").resolve()


def test_manifest_error_lists_every_problem_after_one_header_line(tmp_path):
    from ecl_quant.batch import ManifestError, read_manifest

    bc.write_png(tmp_path / "a.png")
    man = tmp_path / "m.csv"
    man.write_text("path,sample,role,concentration\nmissing.png,s1,standard,1\n"
                   "a.png,s2,standard,abc\n", encoding="utf-8")
    with pytest.raises(ManifestError) as info:
        read_manifest(man)
    lines = str(info.value).splitlines()
    assert lines[0].startswith(str(man)) and "problems" in lines[0]
    assert all(line.startswith("  - line ") or line.startswith("  - ") for line in lines[1:])
    assert any("missing.png" in line for line in lines[1:])
    assert any("'abc'" in line for line in lines[1:])


# ------------------------------------------------------------------ CLI


def _cli_cases():
    return [k for k, c in CASES.items() if c.cli is not None]


@pytest.mark.parametrize("kind", _cli_cases())
def test_cli_prints_one_line_and_exits_2(kind, tmp_path, capsys):
    case = CASES[kind]
    target = bc.build(case, tmp_path)
    argv = case.cli(target, tmp_path)
    if argv[0] not in bc.cli_commands():
        pytest.skip(f"the CLI has no {argv[0]!r} subcommand yet")
    before = {n: (tmp_path / n).read_bytes() for n in case.keep if (tmp_path / n).is_file()}
    capsys.readouterr()
    with bc.fault(case, tmp_path):
        code = main(argv)
    cap = capsys.readouterr()
    lines = cap.err.strip().splitlines()
    assert code == 2, (kind, code, cap.err)
    assert lines and lines[0].startswith("error: "), cap.err
    assert "Traceback" not in cap.err and "Traceback" not in cap.out
    assert len(lines) == 1, f"{kind}: more than one line on stderr:\n{cap.err}"
    named = case.names or _ascii_name(target)
    assert named in lines[0], f"{kind}: {named!r} is not named: {lines[0]}"
    assert not bc.leftovers(tmp_path), bc.leftovers(tmp_path)
    for name, data in before.items():
        assert (tmp_path / name).read_bytes() == data, f"{kind}: {name} was changed"


def test_cli_debug_shows_the_traceback(tmp_path, capsys):
    case = CASES["manifest-missing-file"]
    target = bc.build(case, tmp_path)
    assert main(case.cli(target, tmp_path) + ["--debug"]) == 2
    err = capsys.readouterr().err
    assert "Traceback (most recent call last)" in err
    assert err.strip().splitlines()[-1].startswith("error: ")


def test_cli_internal_error_is_one_line_without_debug(monkeypatch, tmp_path, capsys):
    # A defect (an exception that is not an EclQuantError) must not dump a traceback on a
    # field user either: one line, exit 3, the traceback only with --debug.
    from ecl_quant import batch

    def broken(*args, **kwargs):
        raise ZeroDivisionError("simulated defect")

    monkeypatch.setattr(batch, "read_manifest", broken)
    man = bc.good_manifest(tmp_path / "data")
    argv = ["batch", str(man), "--out", str(tmp_path / "out"), "--quiet"]
    assert main(argv) == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "ZeroDivisionError: simulated defect" in err
    assert "Traceback" not in err
    assert main(argv + ["--debug"]) == 3
    assert "Traceback" in capsys.readouterr().err


# A few cases through a real interpreter: nothing but the one line reaches stderr (no
# traceback, no warning or C-library noise written straight to file descriptor 2).
SUBPROCESS_KINDS = ["manifest-conflicting-roles", "output-not-empty", "caljson-hash-mismatch",
                    "image-png-bad-crc", "video-backwards-timestamps"]


@pytest.mark.parametrize("kind", SUBPROCESS_KINDS)
def test_cli_in_a_subprocess_writes_one_line(kind, tmp_path):
    case = CASES[kind]
    target = bc.build(case, tmp_path)
    argv = case.cli(target, tmp_path)
    if argv[0] not in bc.cli_commands():
        pytest.skip(f"the CLI has no {argv[0]!r} subcommand yet")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.run([sys.executable, "-m", "ecl_quant", *argv], capture_output=True,
                          env=env, timeout=120, check=False)
    err = proc.stderr.decode("utf-8", "backslashreplace")
    assert proc.returncode == 2, err
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert (case.names or _ascii_name(target)) in lines[0]


# ------------------------------------------------------------------ the table in the docs


def test_docs_table_is_generated_from_the_corpus(corpus):
    _root, outcomes = corpus
    want = bc.render_table(outcomes)
    doc = REPO / "docs" / "bad_inputs.md"
    have = doc.read_text(encoding="utf-8") if doc.exists() else ""
    assert have == want, (f"docs/bad_inputs.md is out of date with tests/badcorpus.py; "
                          f"regenerate it with: {bc.TABLE_COMMAND}")
    for c in bc.CASES:
        assert f"| `{c.kind}` |" in have


def test_readme_links_the_table():
    text = (REPO / "README.md").read_text(encoding="utf-8")
    assert re.search(r"^#+ Bad input", text, re.M)
    assert "docs/bad_inputs.md" in text


# ------------------------------------------------------------------ safety

_UNSAFE_CALLS = {"eval", "exec", "compile", "__import__"}
_UNSAFE_MODULES = {"pickle", "cPickle", "dill", "cloudpickle", "marshal", "shelve", "joblib"}


def _unsafe_uses(source: str) -> list[str]:
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else [node.module or ""]
            found += [f"import {n}" for n in names if n.split(".")[0] in _UNSAFE_MODULES]
        if not isinstance(node, ast.Call):
            continue
        f = node.func
        if isinstance(f, ast.Name) and f.id in _UNSAFE_CALLS:
            found.append(f"{f.id}()")
        if isinstance(f, ast.Attribute):
            if f.attr in ("read_pickle", "unsafe_load", "full_load"):
                found.append(f".{f.attr}()")
            if f.attr == "load" and isinstance(f.value, ast.Name) and f.value.id == "yaml":
                found.append("yaml.load()")
            for kw in node.keywords:
                if kw.arg == "allow_pickle" and not (isinstance(kw.value, ast.Constant)
                                                     and kw.value.value is False):
                    found.append(f".{f.attr}(allow_pickle=...)")
    return found


def test_unsafe_use_detector_catches_the_patterns():
    # The detector itself must fire, or the scan below proves nothing.
    bad = ("import pickle\nfrom dill import loads\nx = eval('1')\nexec('y=1')\n"
           "import numpy as np\nnp.load('a', allow_pickle=True)\npd.read_pickle('b')\n")
    assert len(_unsafe_uses(bad)) == 6


def test_package_never_unpickles_or_evaluates():
    offenders = {}
    for path in sorted((REPO / "ecl_quant").rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        uses = _unsafe_uses(text)
        # A plain-text scan too, for anything the syntax walk could miss.
        uses += re.findall(r"\bpickle\.loads?\(|(?<![\w.])eval\(|(?<![\w.])exec\(", text)
        if uses:
            offenders[str(path.relative_to(REPO))] = uses
    assert not offenders, offenders


class _Trap:
    """Unpickling this creates a marker file: proof that something unpickled user data."""

    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def test_pickled_files_are_never_unpickled(tmp_path):
    from ecl_quant.calibration import load_calibration
    from ecl_quant.camera import load_profile
    from ecl_quant.frames import open_recording
    from ecl_quant.radiometry import load_transfer_profile
    from ecl_quant.spots import load_spots

    marker = tmp_path / "UNPICKLED"
    payload = pickle.dumps(_Trap(str(marker)))
    loaders = {"frame.jpg": open_recording, "frame.png": open_recording,
               "clip.mp4": open_recording, "raw.dng": open_recording,
               "spots.json": load_spots, "calibration.json": load_calibration,
               "phone.profile.json": load_profile, "curve.json": load_transfer_profile}
    for name, load in loaders.items():
        (tmp_path / name).write_bytes(payload)
        with pytest.raises(EclQuantError) as info:
            load(tmp_path / name)
        assert info.value.path and name in info.value.path
    assert not marker.exists()


def test_pool_and_dask_transport_only_plain_data(tmp_path, monkeypatch):
    """The batch sends workers paths and settings, never file contents or objects.

    What crosses a process or network boundary is pickled by multiprocessing and dask;
    it must be made of plain JSON types, so no user file is ever unpickled on a worker.
    """
    import dataclasses
    import json

    from ecl_quant import batch

    captured = []

    class Seen(Exception):
        pass

    def fake_iter_completed(func, items, **kw):
        captured.extend(items)
        raise Seen  # stop here: only the items handed to the pool / cluster matter

    monkeypatch.setattr(batch, "iter_completed", fake_iter_completed)
    man = bc.good_manifest(tmp_path / "data")
    with pytest.raises(Seen):
        batch.run_batch(man, batch.BatchSettings(out_dir=tmp_path / "out", workers=2,
                                                 progress=False))
    assert len(captured) == 3
    for job in captured:
        doc = dataclasses.asdict(job)
        assert json.loads(json.dumps(doc)) == doc  # only str/int/bool/None/dict/list
        assert not any(isinstance(v, bytes) for v in doc.values())


# Writes that bypass ecl_quant._io (temporary file + rename) could leave a half-written
# output. Each entry allowed here says why it is not an output.
_STREAMS = {"fh", "buf", "out", "stream"}
_ALLOWED_DIRECT_WRITES = {
    ("radiometry.py", "open(mode='wb')"): "spill file of the dark stack in a TemporaryDirectory",
}


def _direct_writes(source: str) -> list[str]:
    found = []
    for node in ast.walk(ast.parse(source)):
        if not isinstance(node, ast.Call):
            continue
        f = node.func
        if isinstance(f, ast.Attribute) and f.attr in ("write_text", "write_bytes"):
            found.append(f"{f.attr}()")
        elif isinstance(f, ast.Name) and f.id == "open":
            mode = node.args[1] if len(node.args) > 1 else next(
                (k.value for k in node.keywords if k.arg == "mode"), None)
            if isinstance(mode, ast.Constant) and set(str(mode.value)) & set("wax+"):
                found.append(f"open(mode={mode.value!r})")
        elif isinstance(f, ast.Attribute) and f.attr in ("to_csv", "to_parquet", "to_json",
                                                         "savefig", "imwrite", "save",
                                                         "tofile"):
            # Allowed only into an open stream (an atomic_write handle or a BytesIO).
            if node.args and not (isinstance(node.args[0], ast.Name)
                                  and node.args[0].id in _STREAMS):
                found.append(f".{f.attr}(path)")
        elif isinstance(f, ast.Attribute) and f.attr == "dump" and len(node.args) > 1 and not (
                isinstance(node.args[1], ast.Name) and node.args[1].id in _STREAMS):
            found.append(".dump(obj, path)")
    return found


def test_direct_write_detector_catches_the_patterns():
    bad = ("p.write_text('x')\nopen(p, 'w')\nopen(p, mode='ab')\ndf.to_csv(path)\n"
           "fig.savefig('a.png')\njson.dump(doc, open_file)\n")
    good = "open(p)\nopen(p, 'rb')\ndf.to_csv(fh)\nfig.savefig(buf)\njson.dump(doc, fh)\n"
    assert len(_direct_writes(bad)) == 6 and _direct_writes(good) == []


def test_every_output_goes_through_atomic_writes():
    offenders = {}
    for path in sorted((REPO / "ecl_quant").rglob("*.py")):
        if path.name == "_io.py":
            continue
        uses = [u for u in _direct_writes(path.read_text(encoding="utf-8"))
                if (path.name, u) not in _ALLOWED_DIRECT_WRITES]
        if uses:
            offenders[str(path.relative_to(REPO))] = uses
    assert not offenders, (f"write outputs with ecl_quant._io.atomic_write / "
                           f"write_json_atomic: {offenders}")


# ------------------------------------------------------------------ a batch goes on


def test_batch_with_a_damaged_recording_finishes_partially(tmp_path, capsys):
    # One bad recording among good ones: the batch finishes the rest, exits 1, prints one
    # line, and errors.csv names the file and what is wrong (STYLE.md rule 10).
    import shutil

    import pandas as pd

    from ecl_quant.simulate import SimulationSpec, simulate_recording

    study = tmp_path / "study"
    spec = SimulationSpec(size=(48, 64), n_rows=1, n_cols=2, radius_px=5.0, spacing_px=24.0,
                          amplitudes=(0.3, 0.3), n_frames=10, fps=8.0, onset_s=0.3,
                          rise_s=0.2, decay_s=0.5, encoding="png", seed=3)
    simulate_recording(study / "blank", spec)
    for name in ("std1", "std2"):
        shutil.copytree(study / "blank", study / name)
    (study / "pond").mkdir()
    damaged = CASES["image-truncated-jpeg"].make(study / "pond")  # pond/frame_0001.jpg
    (study / "manifest.csv").write_text(
        "path,sample,role,concentration\nblank,b,blank,0\nstd1,s1,standard,1\n"
        "std2,s2,standard,2\npond,pond A,unknown,\n", encoding="utf-8")
    out = tmp_path / "out"
    capsys.readouterr()
    code = main(["batch", str(study / "manifest.csv"), "--out", str(out), "--workers", "1",
                 "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1, err
    assert len(err) == 1 and err[0].startswith("partial: 1 of 4 recording"), err
    errors = pd.read_csv(out / "errors.csv")
    row = errors[errors["path"] == "pond"].iloc[0]
    assert row["error"] == "InputFormatError"
    assert row["message"].startswith("frame_0001.jpg: "), row["message"]
    assert not bc.leftovers(out)


# ------------------------------------------------------------------ never overwrite

# (command line with {d} for the folder, the existing output it must not replace)
_OVERWRITE_CASES = [
    ("calibrate {d}/t.csv --out {d}/calibration.json", "calibration.json"),
    ("quantify {d}/t.csv --calibration {d}/cal.json --out {d}/results.csv", "results.csv"),
    ("measure {d}/rec --out {d}/m", "m/spots.csv"),
    ("camera {d}/flats --out {d}/cam", "cam/camera.json"),
    ("camera --bracket {d}/bracket --profile {d}/phone.json", "phone.json"),
    ("simulate --out {d}/demo", "demo/manifest.csv"),
    ("validate --out {d}/val", "val/summary.json"),
    ("batch {d}/manifest.csv --out {d}/b", "b/notes.txt"),
]


@pytest.mark.parametrize("command, existing", _OVERWRITE_CASES,
                         ids=[c.split()[0] + ("-bracket" if "--bracket" in c else "")
                              for c, _ in _OVERWRITE_CASES])
def test_no_command_replaces_an_existing_output_without_force(tmp_path, capsys, command,
                                                              existing):
    bc.good_manifest(tmp_path)
    target = tmp_path / existing
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_bytes(b"somebody's earlier result\n")
    argv = command.format(d=tmp_path).split() + ["--quiet"]
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--force" in err[0], err
    assert target.read_bytes() == b"somebody's earlier result\n"
