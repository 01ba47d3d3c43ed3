"""Fuzzing the readers: random and mutated inputs end in a result or a typed error.

Property (the contract in errors.py): whatever the bytes, a reader returns normally (an
empty or valid result is fine) or raises an ``EclQuantError`` subclass; any other exception
is a defect, and so is a crash of the interpreter. Hypothesis drives it:
``ECL_QUANT_FUZZ_EXAMPLES`` examples per test (default 40 in ``make test``, derandomized so
the suite is reproducible; ``make fuzz`` runs 2000, random).

Inputs are built after the formats' specifications (PNG ISO/IEC 15948 chunk layout,
Matroska RFC 9559 SimpleBlock timestamps); the mutation operators (bit flips, byte
overwrites, insertions, deletions, truncation, structure-aware field edits) are common
practice in file-format fuzzing.
"""

from __future__ import annotations

import functools
import json
import os
import shutil
import struct
import tempfile
import warnings
import zlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

import badcorpus as bc
from ecl_quant.errors import EclQuantError

_ENV = os.environ.get("ECL_QUANT_FUZZ_EXAMPLES")
EXAMPLES = int(_ENV) if _ENV else 40
FUZZ = settings(max_examples=EXAMPLES, deadline=None, derandomize=_ENV is None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                       HealthCheck.filter_too_much],
                database=None if _ENV is None else settings.default.database)


@pytest.fixture(scope="module")
def scratch():
    d = Path(tempfile.mkdtemp(prefix="ecl-fuzz-"))
    yield d
    shutil.rmtree(d, ignore_errors=True)


def only_typed_errors(call):
    """Run ``call``; an EclQuantError is an acceptable outcome, anything else propagates."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # warnings are not the property under test
        try:
            call()
        except EclQuantError as err:
            assert str(err), "an error must carry a message"
            event(f"outcome: {type(err).__name__}")  # see --hypothesis-show-statistics
            return err
    event("outcome: accepted")
    return None


# ------------------------------------------------------------------ mutation


def mutations(max_ops: int = 6):
    """A list of (operator, position in [0, 1], payload) edits."""
    op = st.sampled_from(["flip", "overwrite", "insert", "delete", "truncate"])
    return st.lists(st.tuples(op, st.floats(0, 1), st.binary(min_size=1, max_size=16)),
                    max_size=max_ops)


def mutate(data: bytes, ops) -> bytes:
    out = bytearray(data)
    for kind, where, payload in ops:
        pos = min(int(where * len(out)), max(len(out) - 1, 0))
        if kind == "flip" and out:
            out[pos] ^= 1 << (payload[0] % 8)
        elif kind == "overwrite":
            out[pos:pos + len(payload)] = payload
        elif kind == "insert":
            out[pos:pos] = payload
        elif kind == "delete":
            del out[pos:pos + payload[0] % 64 + 1]
        elif kind == "truncate":
            del out[pos:]
    return bytes(out)


def _png_with_header(width: int, height: int, depth: int, colour: int) -> bytes:
    # IHDR fields with a valid CRC (so the header is believed), a small IDAT.
    ihdr = struct.pack(">IIBBBBB", width, height, depth, colour, 0, 0, 0)
    raw = zlib.compress(b"\x00" * 256)

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", raw) + chunk(b"IEND", b"")


@functools.lru_cache(maxsize=1)
def _seed_bytes() -> dict[str, bytes]:
    """Valid tiny files of every kind the readers take, as bytes (built once)."""
    import tifffile

    with tempfile.TemporaryDirectory(prefix="ecl-fuzz-seeds-") as tmp:
        d = Path(tmp)
        bc.write_png(d / "a.png")
        bc.write_png(d / "b.png", bc._gradient(dtype=np.uint16))
        bc.write_jpeg(d / "c.jpg")
        tifffile.imwrite(d / "d.tif", bc._gradient(dtype=np.uint16), photometric="rgb")
        bc.write_video(d / "e.mp4", 5)
        bc.write_video(d / "f.mkv", 5, fmt="matroska", codec="mjpeg")
        return {p.name: p.read_bytes() for p in sorted(d.iterdir())}


class _Seeds:
    """Fixture value with a short repr (Hypothesis prints the arguments of a failure)."""

    def __getitem__(self, name: str) -> bytes:
        return _seed_bytes()[name]

    def __repr__(self) -> str:
        return "<seed files>"


@pytest.fixture(scope="module")
def seeds():
    return _Seeds()


def _read(path: Path) -> None:
    from ecl_quant.frames import open_recording

    rec = open_recording(path, fps=10.0)
    for fr in rec.frames():
        assert fr.data.shape[:2] == rec.shape


# ------------------------------------------------------------------ images and videos


_IMAGE_SEEDS = ("a.png", "b.png", "c.jpg", "d.tif")
# Believable PNG headers: any size, depth and colour type, with valid CRCs.
_PNG_HEADERS = st.builds(_png_with_header, st.integers(0, 2**31 - 1), st.integers(0, 2**31 - 1),
                         st.sampled_from([1, 2, 4, 8, 16, 3, 0]),
                         st.sampled_from([0, 2, 3, 4, 6, 5]))


def _blob(seed_names, random_size: int):
    """(seed name or None, edits, random bytes): a mutated seed or random bytes."""
    return st.one_of(st.tuples(st.sampled_from(seed_names), mutations(), st.just(b"")),
                     st.tuples(st.none(), st.just([]), st.binary(max_size=random_size)))


def _bytes_of(seeds, choice) -> bytes:
    name, ops, raw = choice
    return raw if name is None else mutate(seeds[name], ops)


@FUZZ
@given(choice=_blob(_IMAGE_SEEDS, 2048), header=st.none() | _PNG_HEADERS,
       suffix=st.sampled_from([".png", ".jpg", ".jpeg", ".tif", ".tiff", ".dng"]))
def test_image_reader_takes_any_bytes(seeds, scratch, choice, header, suffix):
    blob = header if header is not None else _bytes_of(seeds, choice)
    path = scratch / f"fuzz{suffix}"
    path.write_bytes(blob)
    only_typed_errors(lambda: _read(path))


@FUZZ
@given(data=st.data())
def test_image_folder_of_damaged_and_mixed_files(seeds, scratch, data):
    images = list(_IMAGE_SEEDS)
    folder = scratch / "folder"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir()
    for i in range(data.draw(st.integers(1, 4))):
        src = data.draw(st.sampled_from(images))
        blob = seeds[src] if data.draw(st.booleans()) else mutate(seeds[src], data.draw(mutations(3)))
        (folder / f"frame_{i:03d}{Path(src).suffix}").write_bytes(blob)
    only_typed_errors(lambda: _read(folder))


@FUZZ
@given(choice=_blob(("e.mp4", "f.mkv"), 4096),
       suffix=st.sampled_from([".mp4", ".mkv", ".mov", ".avi"]))
def test_video_reader_takes_mutated_videos(seeds, scratch, choice, suffix):
    path = scratch / f"fuzz{suffix}"
    path.write_bytes(_bytes_of(seeds, choice))
    only_typed_errors(lambda: _read(path))


@FUZZ
@given(times=st.lists(st.integers(-32768, 32767), min_size=5, max_size=5))
def test_video_with_arbitrary_frame_timestamps(seeds, scratch, times):
    # Structure-aware: rewrite the SimpleBlock timestamps of a valid Matroska file.
    buf = bytearray(seeds["f.mkv"])
    offsets: list[int] = []
    bc._simpleblock_time_offsets(buf, 0, len(buf), offsets)
    assert len(offsets) == 5
    for off, t in zip(offsets, times):
        buf[off:off + 2] = struct.pack(">h", t)
    path = scratch / "times.mkv"
    path.write_bytes(bytes(buf))
    from ecl_quant.frames import open_recording

    got = []

    def read() -> None:
        got.extend(fr.time_s for fr in open_recording(path).frames())

    err = only_typed_errors(read)
    if err is None:  # accepted: then the times must never go backwards
        assert all(b >= a for a, b in zip(got, got[1:])), got


# ------------------------------------------------------------------ spot files

_json_scalars = (st.none() | st.booleans() | st.integers(-10**6, 10**6)
                 | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=12))
_json = st.recursive(_json_scalars, lambda kids: st.lists(kids, max_size=4)
                     | st.dictionaries(st.text(max_size=8), kids, max_size=4), max_leaves=12)


def _edit_json(doc, data, depth: int = 0):
    """Replace, delete or add one value somewhere in ``doc`` (returns the new doc)."""
    if isinstance(doc, dict) and doc and depth < 4 and data.draw(st.booleans()):
        key = data.draw(st.sampled_from(sorted(doc)))
        doc = dict(doc)
        doc[key] = _edit_json(doc[key], data, depth + 1)
        return doc
    if isinstance(doc, list) and doc and depth < 4 and data.draw(st.booleans()):
        i = data.draw(st.integers(0, len(doc) - 1))
        doc = list(doc)
        doc[i] = _edit_json(doc[i], data, depth + 1)
        return doc
    action = data.draw(st.sampled_from(["replace", "delete", "add"]))
    if action == "add" and isinstance(doc, dict):
        return {**doc, data.draw(st.text(max_size=8)): data.draw(_json)}
    if action == "delete" and isinstance(doc, dict) and doc:
        key = data.draw(st.sampled_from(sorted(doc)))
        return {k: v for k, v in doc.items() if k != key}
    return data.draw(_json)


def _valid_spot_doc() -> dict:
    from ecl_quant.spots import SPOTS_FORMAT, SPOTS_VERSION

    return {"format": SPOTS_FORMAT, "version": SPOTS_VERSION, "frame_width_px": 32,
            "frame_height_px": 24,
            "spots": [{"number": 1, "shape": "circle", "x": 8, "y": 8, "radius": 3},
                      {"number": 2, "shape": "rect", "x0": 14, "y0": 4, "x1": 20, "y1": 10},
                      {"number": 3, "shape": "polygon", "points": [[24, 4], [30, 4], [27, 10]]}],
            "background": [{"shape": "rect", "x0": 0, "y0": 16, "x1": 31, "y1": 23,
                            "spots": [1, 2]}]}


@FUZZ
@given(data=st.data())
def test_spot_file_reader(scratch, data):
    from ecl_quant.spots import load_spots

    text = json.dumps(_valid_spot_doc())
    how = data.draw(st.sampled_from(["edit", "edit", "bytes", "random"]))
    if how == "edit":
        blob = json.dumps(_edit_json(_valid_spot_doc(), data)).encode()
    elif how == "bytes":
        blob = mutate(text.encode(), data.draw(mutations()))
    else:
        blob = json.dumps(data.draw(_json)).encode()
    path = scratch / "spots.json"
    path.write_bytes(blob)

    def load() -> None:
        spot_set = load_spots(path)
        spot_set.check_fits((24, 32), path=path)
        spot_set.to_frame()

    only_typed_errors(load)


# ------------------------------------------------------------------ manifests

_CELLS = st.sampled_from([
    "blank.png", "std1.png", "std2.png", "./std1.png", "missing.png", "../outside.png",
    "/etc/passwd", "sub", "sub/", "", " ", "blank", "standard", "unknown", "Standard", "0",
    "1", "2.5", "-1", "nan", "inf", "1e400", "1,5", "one", "1-3", "3-1", "0", "1;2;2", "red",
    "luma", "infrared", "srgb", "gamma=2.2", "gamma=-1", "profile=missing.json",
    "profile=../x.json", "#comment", "\"quoted, comma\"", "é", "\x00", "a\nb", "=cmd()",
])
_HEADERS = st.lists(st.sampled_from(["path", "sample", "role", "concentration", "spot",
                                     "dark", "spots", "channel", "transfer", "notes", "Path",
                                     " ROLE ", "extra", ""]), min_size=0, max_size=8)


@FUZZ
@given(header=_HEADERS, rows=st.lists(st.lists(_CELLS | st.text(max_size=6), max_size=9),
                                      max_size=6), raw=st.booleans(), blob=st.binary(max_size=300))
def test_manifest_reader(scratch, header, rows, raw, blob):
    import csv
    import io

    from ecl_quant.batch import read_manifest

    folder = scratch / "manifest"
    if not folder.exists():
        (folder / "sub").mkdir(parents=True)
        for name in ("blank.png", "std1.png", "std2.png"):
            bc.write_png(folder / name)
    path = folder / "manifest.csv"
    if raw:
        path.write_bytes(blob)
    else:
        buf = io.StringIO()
        writer = csv.writer(buf)
        writer.writerow(header)
        writer.writerows(rows)
        path.write_text(buf.getvalue(), encoding="utf-8", errors="surrogateescape")
    only_typed_errors(lambda: read_manifest(path))


# ------------------------------------------------------------------ calibration JSON


@pytest.fixture(scope="module")
def calibration_doc(scratch):
    path = bc.good_calibration_json(scratch / "calibration-seed.json")
    return json.loads(path.read_text(encoding="utf-8"))


@FUZZ
@given(data=st.data())
def test_calibration_json_reader(scratch, calibration_doc, data):
    from ecl_quant.calibration import load_calibration

    how = data.draw(st.sampled_from(["edit", "edit-rehash", "bytes"]))
    if how == "bytes":
        blob = mutate(json.dumps(calibration_doc).encode(), data.draw(mutations()))
    else:
        doc = _edit_json(calibration_doc, data)
        if how == "edit-rehash" and isinstance(doc, dict):
            try:
                doc = bc._rehash(doc)  # a forger who knows the hash: the schema must hold
            except (ValueError, TypeError):
                pass  # NaN/inf are not canonical JSON: keep the stale hash
        blob = json.dumps(doc).encode()
    path = scratch / "calibration.json"
    path.write_bytes(blob)

    def load() -> None:
        cal = load_calibration(path)
        cal.predict(np.array([0.0, 1.0]))
        cal.inverse_predict([0.5])

    only_typed_errors(load)


# ------------------------------------------------------------------ calibrate

_numbers = (st.floats(allow_nan=True, allow_infinity=True, width=64)
            | st.floats(-10, 10) | st.sampled_from([0.0, 1.0, 2.0, 4.0, 8.0, -1.0, 1e-300,
                                                     1e300]))
_cells = _numbers | st.sampled_from(["", "abc", "1,5", " 2 ", None])


@FUZZ
@given(conc=st.lists(_cells, min_size=0, max_size=12), data=st.data())
def test_calibrate_takes_any_table(conc, data):
    from ecl_quant.calibration import MODEL_NAMES, WEIGHT_RULES, calibrate_table

    n = len(conc)
    resp = data.draw(st.lists(_cells, min_size=n, max_size=n))
    cols = {"concentration": conc, "response": resp}
    if data.draw(st.booleans()):
        cols["role"] = data.draw(st.lists(st.sampled_from(["standard", "blank", "unknown",
                                                           "", "std", None]),
                                          min_size=n, max_size=n))
    if data.draw(st.booleans()):
        cols["response_se"] = data.draw(st.lists(_cells, min_size=n, max_size=n))
    df = pd.DataFrame(cols)
    model = data.draw(st.sampled_from(MODEL_NAMES))
    weights = data.draw(st.sampled_from([None, *WEIGHT_RULES]))
    level = data.draw(st.sampled_from([0.95, 0.99, 0.5, 1.0, 0.0, float("nan")]))

    def fit() -> None:
        cal = calibrate_table(df, model=model, weights=weights, level=level)
        cal.to_dict()
        cal.inverse_predict([float(np.nanmedian(pd.to_numeric(df["response"],
                                                              errors="coerce")))])

    only_typed_errors(fit)


@FUZZ
@given(data=st.data())
def test_calibrate_on_plausible_standards(data):
    # Near-valid data (the common case in the field): levels, replicates, noise, outliers.
    from ecl_quant.calibration import MODEL_NAMES, fit_calibration

    levels = data.draw(st.lists(st.sampled_from([0.0, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0]),
                                min_size=2, max_size=7, unique=True))
    reps = data.draw(st.integers(1, 3))
    x = np.repeat(np.array(levels), reps)
    slope = data.draw(st.floats(-5, 5))
    noise = data.draw(st.floats(0, 2))
    seed = data.draw(st.integers(0, 2**16))
    y = 0.1 + slope * x + np.random.default_rng(seed).normal(0, noise + 1e-12, x.size)
    if data.draw(st.booleans()):
        y[data.draw(st.integers(0, y.size - 1))] *= data.draw(st.floats(-100, 100))
    model = data.draw(st.sampled_from(MODEL_NAMES))

    def fit() -> None:
        cal = fit_calibration(x, y, model=model)
        cal.inverse_predict([float(np.median(y))])

    only_typed_errors(fit)


# ------------------------------------------------------------------ device profiles


def _valid_profile_doc() -> dict:
    curve = [(i / 255) ** 2.2 for i in range(256)]
    return {"schema": "ecl_quant.device_profile", "version": 1,
            "response": {"red": curve, "green": curve, "blue": curve, "luma": curve},
            "device": {"make": "Tern", "model": "Cam1"}}


@FUZZ
@given(data=st.data())
def test_device_profile_readers(scratch, data):
    # Both readers of profile JSON: the camera module's (schema-validated) and the one
    # behind --transfer profile=FILE (radiometry), then a lookup through the curve.
    from ecl_quant.camera import load_profile
    from ecl_quant.radiometry import load_transfer_profile

    how = data.draw(st.sampled_from(["edit", "edit", "bytes"]))
    if how == "bytes":
        blob = mutate(json.dumps(_valid_profile_doc()).encode(), data.draw(mutations()))
    else:
        blob = json.dumps(_edit_json(_valid_profile_doc(), data)).encode()
    path = scratch / f"profile-{data.draw(st.integers(0, 10**9))}.json"  # a fresh name:
    path.write_bytes(blob)  # the radiometry reader caches by path, size and mtime
    only_typed_errors(lambda: load_profile(path))

    def lookup() -> None:
        prof = load_transfer_profile(path)
        prof(np.array([0.0, 0.5, 1.0, 1.2]), "red")

    only_typed_errors(lookup)
    path.unlink()


# ------------------------------------------------------------------ CSV tables from bytes

_GOOD_TABLE = b"concentration,response,role\n0,0.011,blank\n0,0.009,blank\n1,0.52,standard\n" \
              b"2,1.01,standard\n4,2.03,standard\n8,3.98,standard\n"
_GOOD_LEVELS = b"file,role,exposure_s\nflat_0.png,flat,0.01\nflat_1.png,flat,0.01\n"


@FUZZ
@given(ops=mutations(8), suffix=st.sampled_from([".csv", ".tsv", ".txt", ".parquet"]))
def test_calibration_table_reader(scratch, ops, suffix):
    from ecl_quant.calibration import calibrate_table, read_table

    path = scratch / f"standards{suffix}"
    path.write_bytes(mutate(_GOOD_TABLE, ops))
    only_typed_errors(lambda: calibrate_table(read_table(path), model="linear", path=path))


@FUZZ
@given(ops=mutations(8))
def test_camera_levels_reader(scratch, ops):
    from ecl_quant.camera import discover_levels

    folder = scratch / "flats"
    if not folder.exists():
        folder.mkdir()
        for i in range(2):
            bc.write_png(folder / f"flat_{i}.png", bc._gradient(colour=False, seed=i))
    (folder / "levels.csv").write_bytes(mutate(_GOOD_LEVELS, ops))
    only_typed_errors(lambda: discover_levels(folder))
