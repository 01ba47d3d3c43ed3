"""Bad-input corpus: a generator of damaged, wrong and hostile inputs for every stage.

Nothing here is stored in git as a binary: each case writes its input into a scratch
folder from a few lines of code (tiny 32x24 images, 5-frame videos), then feeds it to the
public API. The outcome of every case (the typed error and its message, or "accepted")
is what ``docs/bad_inputs.md`` lists; ``tests/test_bad_inputs.py`` checks the outcomes and
that the table in the docs is the one this module generates.

Regenerate the table after changing a message::

    .venv/bin/python -m tests.badcorpus --write-table docs/bad_inputs.md

Outside references for the file formats built here: PNG (ISO/IEC 15948, W3C PNG
specification: chunk layout length/type/data/CRC-32, IHDR fields), Matroska (IETF RFC
9559: EBML element IDs and variable-size integers, SimpleBlock relative timestamp as a
signed 16-bit integer), JPEG (ITU-T T.81: a stream cut short loses its EOI marker).
"""

from __future__ import annotations

import argparse
import builtins
import contextlib
import errno
import io
import json
import os
import re
import socket
import stat
import struct
import sys
import tempfile
import zlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import Any
from unittest import mock

import numpy as np

from ecl_quant.errors import (
    CalibrationError,
    EclQuantError,
    InputFormatError,
    OutputError,
    ShapeMismatchError,
    SpotError,
)

__all__ = ["BadCase", "Outcome", "CASES", "run_case", "run_all", "render_table",
           "readonly_guard", "disk_full", "write_png", "write_jpeg", "write_video",
           "good_calibration_json", "good_manifest", "H", "W"]

#: Size of every test image (rows, columns): small enough that the whole corpus runs in
#: seconds.
H, W = 24, 32
TABLE_COMMAND = ".venv/bin/python -m tests.badcorpus --write-table docs/bad_inputs.md"


# ============================================================== file builders


def _gradient(h: int = H, w: int = W, *, colour: bool = True, dtype: Any = np.uint8,
              seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    top = np.iinfo(dtype).max
    base = np.linspace(0.1, 0.9, w)[None, :] * np.linspace(0.5, 1.0, h)[:, None]
    img = base + rng.normal(0, 0.01, base.shape)
    arr = np.clip(img * top, 0, top).astype(dtype)
    return np.stack([arr, arr // 2, arr // 3], axis=-1) if colour else arr


def write_png(path: Path, arr: np.ndarray | None = None) -> Path:
    """Write an 8- or 16-bit PNG (grey or RGB) with OpenCV."""
    import cv2

    arr = _gradient() if arr is None else arr
    data = arr[..., ::-1] if arr.ndim == 3 else arr
    ok, buf = cv2.imencode(".png", np.ascontiguousarray(data))
    assert ok
    path.write_bytes(buf.tobytes())
    return path


def write_jpeg(path: Path, arr: np.ndarray | None = None) -> Path:
    """Write an 8-bit RGB baseline JPEG with Pillow."""
    from PIL import Image

    arr = _gradient() if arr is None else arr
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="JPEG", quality=90)
    path.write_bytes(buf.getvalue())
    return path


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    # PNG specification section 5.3: length, type, data, CRC-32 over type and data.
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def png_claiming(width: int, height: int) -> bytes:
    """A valid-looking PNG whose IHDR claims width x height grey pixels (IDAT is tiny)."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 64)
    return (b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", idat)
            + _png_chunk(b"IEND", b""))


def png_with_bad_crc(good: bytes) -> bytes:
    """Flip the CRC of the first IDAT chunk of a PNG."""
    pos = 8
    out = bytearray(good)
    while pos < len(out):
        (length,) = struct.unpack(">I", out[pos:pos + 4])
        kind = bytes(out[pos + 4:pos + 8])
        crc_at = pos + 8 + length
        if kind == b"IDAT":
            out[crc_at + 3] ^= 0xFF
            return bytes(out)
        pos = crc_at + 4
    raise AssertionError("no IDAT chunk")


def write_video(path: Path, n_frames: int = 5, *, fmt: str | None = None,
                codec: str = "libx264", fps: int = 10) -> Path:
    """Write a tiny video of ``n_frames`` 32x24 frames (brightening grey ramp)."""
    import av

    pix = "yuvj420p" if codec == "mjpeg" else "yuv420p"
    with av.open(str(path), "w", format=fmt) as c:
        s = c.add_stream(codec, rate=fps)
        s.width, s.height, s.pix_fmt = W, H, pix
        s.time_base = Fraction(1, 1000)
        s.codec_context.time_base = Fraction(1, 1000)
        for i in range(n_frames):
            img = np.full((H, W, 3), 30 + 40 * i, np.uint8)
            fr = av.VideoFrame.from_ndarray(img, format="rgb24")
            fr.pts, fr.time_base = i * (1000 // fps), s.time_base
            for pk in s.encode(fr):
                c.mux(pk)
        for pk in s.encode():
            c.mux(pk)
    return path


def write_audio_only(path: Path) -> Path:
    """An MP4 holding a 0.2 s AAC tone and no video stream."""
    import av

    with av.open(str(path), "w") as c:
        s = c.add_stream("aac", rate=8000)
        t = np.arange(1600) / 8000.0
        samples = (0.2 * np.sin(2 * np.pi * 440 * t)).astype(np.float32)[None, :]
        fr = av.AudioFrame.from_ndarray(samples, format="fltp", layout="mono")
        fr.sample_rate, fr.pts = 8000, 0
        for pk in s.encode(fr):
            c.mux(pk)
        for pk in s.encode():
            c.mux(pk)
    return path


def write_empty_video_stream(path: Path) -> Path:
    """A Matroska file with a declared video stream but not one packet."""
    import av

    with av.open(str(path), "w", format="matroska") as c:
        s = c.add_stream("mjpeg", rate=10)
        s.width, s.height, s.pix_fmt = W, H, "yuvj420p"
        c.start_encoding()  # header and tracks, then no packet at all
    return path


def _ebml_vint(buf: bytes | bytearray, pos: int, *, keep_marker: bool) -> tuple[int, int]:
    # RFC 9559 / RFC 8794 section 4: the count of leading zero bits gives the length.
    first = buf[pos]
    length, mask = 1, 0x80
    while length <= 8 and not first & mask:
        mask >>= 1
        length += 1
    value = first if keep_marker else first & (mask - 1)
    for k in range(1, length):
        value = (value << 8) | buf[pos + k]
    return value, pos + length


def _simpleblock_time_offsets(buf: bytes | bytearray, start: int, end: int,
                              out: list[int]) -> None:
    segment, cluster, simple_block = 0x18538067, 0x1F43B675, 0xA3
    pos = start
    while pos < end:
        eid, p = _ebml_vint(buf, pos, keep_marker=True)
        size, p = _ebml_vint(buf, p, keep_marker=False)
        if eid in (segment, cluster):
            _simpleblock_time_offsets(buf, p, min(end, p + size), out)
        elif eid == simple_block:
            _track, q = _ebml_vint(buf, p, keep_marker=False)
            out.append(q)  # the signed 16-bit timestamp relative to the cluster
        pos = p + size


def write_backwards_video(path: Path, times_ms: tuple[int, ...] = (0, 100, 200, 150, 50)) -> Path:
    """A Matroska MJPEG video whose frame timestamps go backwards after frame 2.

    FFmpeg's muxers refuse decreasing timestamps, so a regular file is written and the
    relative timestamps of its SimpleBlocks are then overwritten in place.
    """
    write_video(path, len(times_ms), fmt="matroska", codec="mjpeg")
    buf = bytearray(path.read_bytes())
    offsets: list[int] = []
    _simpleblock_time_offsets(buf, 0, len(buf), offsets)
    assert len(offsets) == len(times_ms), offsets
    for off, t in zip(offsets, times_ms):
        buf[off:off + 2] = struct.pack(">h", t)
    path.write_bytes(bytes(buf))
    return path


def good_calibration_json(path: Path) -> Path:
    """A valid calibration.json (linear fit of five invented standards, demo units)."""
    from ecl_quant.calibration import fit_calibration, save_calibration

    x = [0.0, 0.0, 1.0, 2.0, 4.0, 8.0]
    y = [0.011, 0.009, 0.52, 1.01, 2.03, 3.98]
    cal = fit_calibration(x, y, model="linear", units="umol/L")
    save_calibration(cal, path)
    return path


def _rehash(doc: dict[str, Any]) -> dict[str, Any]:
    from ecl_quant._calio import canonical_hash

    doc = {k: v for k, v in doc.items() if k != "sha256"}
    doc["sha256"] = canonical_hash(doc)
    return doc


def good_manifest(folder: Path, *, extra_rows: str = "") -> Path:
    """A valid manifest of three tiny PNG recordings (two standards, one blank)."""
    folder.mkdir(parents=True, exist_ok=True)
    for name in ("blank.png", "std1.png", "std2.png"):
        write_png(folder / name)
    text = ("path,sample,role,concentration\n"
            "blank.png,pond blank,blank,0\n"
            "std1.png,std 1,standard,1\n"
            "std2.png,std 2,standard,2\n" + extra_rows)
    (folder / "manifest.csv").write_text(text, encoding="utf-8")
    return folder / "manifest.csv"


# ============================================================== simulated faults


def _under(path: Any, root: Path) -> Path | None:
    try:
        p = Path(os.fsdecode(path)) if not isinstance(path, int) else None
    except TypeError:
        return None
    if p is None:
        return None
    p = p if p.is_absolute() else Path.cwd() / p
    try:
        p.relative_to(root)
    except ValueError:
        return None
    return p


def _writable(folder: Path) -> bool:
    try:
        return bool(os.stat(folder).st_mode & stat.S_IWUSR)
    except OSError:
        return True


@contextlib.contextmanager
def readonly_guard(root: Path) -> Iterator[None]:
    """Make permission bits under ``root`` binding, as they are for a normal user.

    The superuser ignores ``chmod a-w``; when the tests run as root, creating, renaming
    or opening for writing under a folder without its write bit raises
    ``PermissionError(EACCES)`` here exactly as the kernel would for anyone else.
    Outside ``root`` nothing changes.
    """
    if os.geteuid() != 0:
        yield
        return
    root = Path(root).resolve()
    real_open, real_os_open = builtins.open, os.open
    real_mkdir, real_replace, real_rename = os.mkdir, os.replace, os.rename

    def denied(p: Path) -> PermissionError:
        return PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(p))

    def check_create(path: Any) -> None:
        p = _under(path, root)
        if p is not None and not p.exists() and not _writable(p.parent):
            raise denied(p)
        if p is not None and p.exists() and p.is_file() and not _writable(p):
            raise denied(p)

    def g_open(file: Any, mode: str = "r", *args: Any, **kw: Any) -> Any:
        if any(c in mode for c in "wax+"):
            check_create(file)
        return real_open(file, mode, *args, **kw)

    def g_os_open(path: Any, flags: int, *args: Any, **kw: Any) -> int:
        if flags & (os.O_WRONLY | os.O_RDWR | os.O_CREAT):
            check_create(path)
        return real_os_open(path, flags, *args, **kw)

    def g_mkdir(path: Any, *args: Any, **kw: Any) -> None:
        p = _under(path, root)
        if p is not None and not _writable(p.parent):
            raise denied(p)
        real_mkdir(path, *args, **kw)

    def g_move(real: Callable[..., None]) -> Callable[..., None]:
        def move(src: Any, dst: Any, *args: Any, **kw: Any) -> None:
            for q in (src, dst):
                p = _under(q, root)
                if p is not None and not _writable(p.parent):
                    raise denied(p)
            real(src, dst, *args, **kw)
        return move

    with mock.patch.object(builtins, "open", g_open), \
            mock.patch.object(io, "open", g_open), \
            mock.patch.object(os, "open", g_os_open), \
            mock.patch.object(os, "mkdir", g_mkdir), \
            mock.patch.object(os, "replace", g_move(real_replace)), \
            mock.patch.object(os, "rename", g_move(real_rename)):
        yield


@contextlib.contextmanager
def disk_full() -> Iterator[None]:
    """Every ``os.fsync`` fails with ENOSPC, as on a full disk (data never reaches it)."""

    def fsync(fd: int) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with mock.patch.object(os, "fsync", fsync):
        yield


# ============================================================== cases


@dataclass(frozen=True)
class BadCase:
    """One kind of bad input.

    Attributes
    ----------
    kind : str
        Short identifier (the table's first column).
    group : str
        images, videos, spot files, manifests, calibration tables, calibration JSON,
        device profiles, outputs.
    what : str
        The input, in words.
    make : callable(folder) -> Path
        Writes the input inside ``folder`` and returns the path handed to the stage.
    probe : callable(target, folder) -> str
        Calls the public API on it; returns a short description when it is accepted.
    expect : type or None
        The EclQuantError subclass it must raise; None when it is valid input that must
        be accepted.
    cli : callable(target, folder) -> list of str, or None
        Arguments for ``ecl_quant.cli.main`` that reach the same problem.
    context : callable(folder) -> context manager, or None
        A simulated fault (read-only folder, full disk) active during probe and CLI.
    keep : tuple of str
        Files (relative to folder) that must be byte-for-byte unchanged afterwards.
    names : str or None
        What the CLI message must name when it is not the target file (an output folder).
    """

    kind: str
    group: str
    what: str
    make: Callable[[Path], Path]
    probe: Callable[[Path, Path], str]
    expect: type[EclQuantError] | None
    cli: Callable[[Path, Path], list[str]] | None = None
    context: Callable[[Path], contextlib.AbstractContextManager[Any]] | None = None
    keep: tuple[str, ...] = ()
    names: str | None = None


# ---------------------------------------------------------------- probes


def read_recording(target: Path, folder: Path) -> str:
    """Open a recording and decode every frame; check the times go forward."""
    from ecl_quant.frames import open_recording

    rec = open_recording(target, fps=10.0)
    times = [fr.time_s for fr in rec.frames()]
    return f"{len(times)} frame(s) read, {rec.shape[1]}x{rec.shape[0]}"


def _spots_probe(target: Path, folder: Path) -> str:
    from ecl_quant.spots import load_spots

    spot_set = load_spots(target)
    spot_set.check_fits((H, W), path=target)
    return f"{len(spot_set)} spot(s)"


def _manifest_probe(target: Path, folder: Path) -> str:
    from ecl_quant.batch import read_manifest

    man = read_manifest(target)
    return f"{len(man.rows)} row(s)"


def _manifest_key_probe(target: Path, folder: Path) -> str:
    """Validate the manifest and compute every recording's cache key (hashes its files)."""
    from ecl_quant.batch import read_manifest, recording_key

    man = read_manifest(target)
    keys = {recording_key(r.path, parameters={}) for r in man.recordings}
    return f"{len(man.rows)} row(s), {len(keys)} distinct cache key(s)"


def _table_probe(target: Path, folder: Path) -> str:
    from ecl_quant.calibration import calibrate_table, read_table

    cal = calibrate_table(read_table(target), model="linear", path=target)
    return f"model {cal.model}"


def _caljson_probe(target: Path, folder: Path) -> str:
    from ecl_quant.calibration import load_calibration

    cal = load_calibration(target)
    return f"model {cal.model}"


def _profile_probe(target: Path, folder: Path) -> str:
    from ecl_quant.camera import load_profile

    load_profile(target)
    return "profile read"


def _batch_probe(out_name: str) -> Callable[[Path, Path], str]:
    def probe(target: Path, folder: Path) -> str:
        from ecl_quant.batch import BatchSettings, run_batch

        res = run_batch(target, BatchSettings(out_dir=folder / out_name, workers=1,
                                              progress=False))
        return f"batch exit code {res.exit_code}"
    return probe


def _save_cal_probe(target: Path, folder: Path) -> str:
    from ecl_quant.calibration import fit_calibration, save_calibration

    cal = fit_calibration([0, 1, 2, 4], [0.0, 1.0, 2.1, 3.9], model="linear")
    save_calibration(cal, target)
    return "written"


def _subcommand_probe(argv: Callable[[Path, Path], list[str]]) -> Callable[[Path, Path], str]:
    """Run a CLI subcommand's handler directly, so its exception is seen as raised."""
    def probe(target: Path, folder: Path) -> str:
        from ecl_quant.cli import build_parser

        args = build_parser().parse_args(argv(target, folder))
        return f"exit code {args.run(args)}"
    return probe


# ---------------------------------------------------------------- CLI argument builders


def _cli_measure(target: Path, folder: Path) -> list[str]:
    return ["measure", str(target), "--out", str(folder / "out"), "--fps", "10", "--quiet"]


def _cli_measure_spots(target: Path, folder: Path) -> list[str]:
    rec = write_png(folder / "card.png")
    return ["measure", str(rec), "--spots", str(target), "--out", str(folder / "out"),
            "--quiet"]


def _measure_probe(target: Path, folder: Path) -> str:
    """Measure a recording with one spot given in a file."""
    from ecl_quant.measure import measure

    spots = _file("spots.json", _spot_doc([_GOOD_SPOT]))(folder)
    res = measure(target, spots=spots)
    flags = ";".join(sorted(set(";".join(res.spots_table["flags"]).split(";")) - {""}))
    return (f"{len(res.curves_table['frame'].unique())} frame(s) measured, spot flags "
            f"{flags or 'none'}")


def _measure_with(**options: Any) -> Callable[[Path, Path], str]:
    """Probe: measure the tiny recording card.png beside the target with one given spot,
    the target passed as ``dark`` (when ``options`` has dark=True) or as a transfer profile."""
    def probe(target: Path, folder: Path) -> str:
        from ecl_quant.measure import MeasureSettings, measure

        rec = write_png(folder / "card.png")
        spots = _file("spots.json", _spot_doc([_GOOD_SPOT]))(folder)
        if options.get("dark"):
            res = measure(rec, spots=spots, dark=target)
        else:
            res = measure(rec, spots=spots,
                          settings=MeasureSettings(transfer=f"profile={target}"))
        return f"{len(res.spot_set)} spot(s) measured"
    return probe


def _cli_measure_dark(target: Path, folder: Path) -> list[str]:
    rec = write_png(folder / "card.png")
    spots = _file("spots.json", _spot_doc([_GOOD_SPOT]))(folder)
    return ["measure", str(rec), "--spots", str(spots), "--dark", str(target), "--out",
            str(folder / "out"), "--quiet"]


def _cli_measure_profile(target: Path, folder: Path) -> list[str]:
    rec = write_png(folder / "card.png")
    spots = _file("spots.json", _spot_doc([_GOOD_SPOT]))(folder)
    return ["measure", str(rec), "--spots", str(spots), "--transfer", f"profile={target}",
            "--out", str(folder / "out"), "--quiet"]


def _dark_of_other_size(folder: Path) -> Path:
    darks = folder / "darks"
    darks.mkdir()
    for i in range(2):
        write_png(darks / f"dark_{i:02d}.png", _gradient(H, W - 2, seed=i) // 8)
    return darks


def _levels(rows: str) -> Callable[[Path], Path]:
    """A photon-transfer folder: two flat PNGs, a frame outside it, and levels.csv."""
    def make(folder: Path) -> Path:
        flats = folder / "flats"
        flats.mkdir()
        for i in range(2):
            write_png(flats / f"flat_{i}.png", _gradient(colour=False, seed=i))
        write_png(folder / "elsewhere.png", _gradient(colour=False))
        (flats / "levels.csv").write_text("file,role,exposure_s\n" + rows, encoding="utf-8")
        return flats
    return make


def _levels_probe(target: Path, folder: Path) -> str:
    from ecl_quant.camera import discover_levels

    return f"{len(discover_levels(target))} level group(s)"


def _cli_camera(target: Path, folder: Path) -> list[str]:
    return ["camera", str(target), "--out", str(folder / "out"), "--quiet"]


def _cli_batch(out_name: str) -> Callable[[Path, Path], list[str]]:
    def argv(target: Path, folder: Path) -> list[str]:
        return ["batch", str(target), "--out", str(folder / out_name), "--workers", "1",
                "--quiet"]
    return argv


def _cli_calibrate(target: Path, folder: Path) -> list[str]:
    return ["calibrate", str(target), "--out", str(folder / "calibration-new.json"), "--quiet"]


def _cli_quantify(target: Path, folder: Path) -> list[str]:
    table = folder / "unknowns.csv"
    table.write_text("sample,response\npond A,1.5\n", encoding="utf-8")
    return ["quantify", str(table), "--calibration", str(target), "--out",
            str(folder / "results.csv"), "--quiet"]


# ---------------------------------------------------------------- makers


def _file(name: str, content: bytes | str | Callable[[], str]) -> Callable[[Path], Path]:
    def make(folder: Path) -> Path:
        p = folder / name
        data = content() if callable(content) else content
        p.write_bytes(data.encode("utf-8") if isinstance(data, str) else data)
        return p
    return make


def _truncated_jpeg(folder: Path) -> Path:
    p = write_jpeg(folder / "frame_0001.jpg")
    data = p.read_bytes()
    p.write_bytes(data[: len(data) * 6 // 10])
    return p


def _bad_crc_png(folder: Path) -> Path:
    p = write_png(folder / "frame_0001.png")
    p.write_bytes(png_with_bad_crc(p.read_bytes()))
    return p


def _bomb(folder: Path) -> Path:
    p = folder / "huge.png"
    p.write_bytes(png_claiming(200_000, 200_000))
    return p


def _folder_of(*arrays: np.ndarray, names: tuple[str, ...] | None = None) -> Callable[[Path], Path]:
    def make(folder: Path) -> Path:
        rec = folder / "burst"
        rec.mkdir()
        for i, arr in enumerate(arrays):
            name = names[i] if names else f"frame_{i + 1:04d}.png"
            write_png(rec / name, arr)
        return rec
    return make


def _float_tiff(folder: Path) -> Path:
    import tifffile

    p = folder / "frame_0001.tif"
    tifffile.imwrite(p, np.full((H, W), 0.5, np.float32))
    return p


def _fake_dng(folder: Path) -> Path:
    p = write_jpeg(folder / "IMG_0001.dng")
    return p


def _tiff_dng(folder: Path) -> Path:
    import tifffile

    p = folder / "IMG_0002.dng"
    tifffile.imwrite(p, _gradient(colour=False, dtype=np.uint16), photometric="minisblack")
    return p


def _empty_folder(folder: Path) -> Path:
    rec = folder / "burst"
    rec.mkdir()
    (rec / "notes.txt").write_text("pond A, second try\n", encoding="utf-8")
    return rec


def _odd_names(folder: Path) -> Path:
    rec = folder / "card 3 (pond)"
    rec.mkdir()
    write_png(rec / "frame 0001.png")
    # A name that is not valid UTF-8 (Latin-1 "é" byte), as copied from an old card.
    write_png(Path(os.fsdecode(os.fsencode(str(rec)) + b"/frame\xe90002.png")))
    return rec


def _non_utf8_damaged(folder: Path) -> Path:
    p = Path(os.fsdecode(os.fsencode(str(folder)) + b"/r\xe9sultat 1.jpg"))
    good = write_jpeg(folder / "tmp.jpg").read_bytes()
    (folder / "tmp.jpg").unlink()
    p.write_bytes(good[: len(good) // 2])
    return p


def _video(n: int, **kw: Any) -> Callable[[Path], Path]:
    def make(folder: Path) -> Path:
        return write_video(folder / ("clip.mkv" if kw.get("fmt") == "matroska" else "clip.mp4"),
                           n, **kw)
    return make


def _truncated_video(folder: Path) -> Path:
    p = write_video(folder / "clip.mp4", 5)
    data = p.read_bytes()
    # MP4 from FFmpeg keeps its index (moov) at the end: cutting the tail loses it.
    p.write_bytes(data[: len(data) // 2])
    return p


def _spot_doc(spots: list[dict[str, Any]], **extra: Any) -> Callable[[], str]:
    """The text of a spot file (built when the case runs, with the module's format name)."""
    def text() -> str:
        from ecl_quant.spots import SPOTS_FORMAT, SPOTS_VERSION

        doc = {"format": SPOTS_FORMAT, "version": SPOTS_VERSION, "spots": spots}
        return json.dumps({**doc, **extra})
    return text


def _spots(name: str, text: str | Callable[[], str]) -> Callable[[Path], Path]:
    return _file(name, text)


def _manifest(text: str | bytes, *, files: tuple[str, ...] = ("blank.png", "std1.png",
                                                               "std2.png", "std4.png")
              ) -> Callable[[Path], Path]:
    def make(folder: Path) -> Path:
        for f in files:
            write_png(folder / f)
        p = folder / "manifest.csv"
        p.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
        return p
    return make


def _escape_manifest(folder: Path) -> Path:
    inner = folder / "run"
    inner.mkdir()
    for f in ("blank.png", "std1.png", "std2.png"):
        write_png(inner / f)
    write_png(folder / "elsewhere.png")
    p = inner / "manifest.csv"
    p.write_text("path,sample,role,concentration\nblank.png,b,blank,0\nstd1.png,s1,standard,1\n"
                 "std2.png,s2,standard,2\n../elsewhere.png,s4,standard,4\n", encoding="utf-8")
    return p


def _odd_names_manifest(folder: Path) -> Path:
    for seed, name in enumerate(("blank", "std 1", "std 2")):
        (folder / name).mkdir()
        write_png(folder / name / "frame 0001.png", _gradient(seed=seed))
        write_png(Path(os.fsdecode(os.fsencode(str(folder / name)) + b"/frame\xe90002.png")),
                  _gradient(seed=seed))
    p = folder / "manifest.csv"
    p.write_text('path,sample,role,concentration\nblank,b,blank,0\n"std 1",s1,standard,1\n'
                 '"std 2",s2,standard,2\n', encoding="utf-8")
    return p


def _symlink_escape_manifest(folder: Path) -> Path:
    p = _escape_manifest(folder)
    (p.parent / "linked.png").symlink_to(folder / "elsewhere.png")
    p.write_text("path,sample,role,concentration\nblank.png,b,blank,0\nstd1.png,s1,standard,1\n"
                 "std2.png,s2,standard,2\nlinked.png,s4,standard,4\n", encoding="utf-8")
    return p


def _table(text: str, name: str = "standards.csv") -> Callable[[Path], Path]:
    return _file(name, text)


def _tampered(edit: Callable[[dict[str, Any]], dict[str, Any]]) -> Callable[[Path], Path]:
    def make(folder: Path) -> Path:
        p = good_calibration_json(folder / "calibration.json")
        doc = json.loads(p.read_text(encoding="utf-8"))
        p.write_text(json.dumps(edit(doc), indent=2), encoding="utf-8")
        return p
    return make


def _edit_param(doc: dict[str, Any]) -> dict[str, Any]:
    # Hand-edit a fitted number and keep the stale hash.
    doc = json.loads(json.dumps(doc))
    _bump_first_number(doc, ("params", "parameters", "fit"))
    return doc


def _bump_first_number(doc: Any, keys: tuple[str, ...]) -> None:
    for k in keys:
        if isinstance(doc, dict) and k in doc:
            if _bump_any(doc[k]):
                return
    if not _bump_any(doc):
        raise AssertionError("no number to edit in the calibration document")


def _bump_any(node: Any) -> bool:
    if isinstance(node, dict):
        return any(_bump_key(node, k) for k in list(node))
    if isinstance(node, list):
        for i, v in enumerate(node):
            if isinstance(v, float):
                node[i] = v * 1.5 + 0.1
                return True
            if _bump_any(v):
                return True
    return False


def _bump_key(node: dict[str, Any], k: str) -> bool:
    v = node[k]
    if isinstance(v, float):
        node[k] = v * 1.5 + 0.1
        return True
    return _bump_any(v)


def _calibration_with_stale_json(folder: Path) -> Path:
    # A table for the CLI quantify path is written by _cli_quantify.
    return _tampered(_edit_param)(folder)


def _profile_json(doc: Any) -> Callable[[Path], Path]:
    return _file("phone.profile.json", json.dumps(doc))


def _readonly_out(folder: Path) -> Path:
    man = good_manifest(folder / "data")
    ro = folder / "readonly"
    ro.mkdir()
    ro.chmod(0o555)
    return man


def _existing_out(folder: Path) -> Path:
    man = good_manifest(folder / "data")
    out = folder / "results"
    out.mkdir()
    (out / "summary.xlsx").write_bytes(b"a spreadsheet someone keeps here")
    return man


def _out_is_file(folder: Path) -> Path:
    man = good_manifest(folder / "data")
    (folder / "results").write_text("not a folder\n", encoding="utf-8")
    return man


def _disk_full_target(folder: Path) -> Path:
    p = folder / "calibration.json"
    p.write_text('{"previous": "calibration, must survive"}\n', encoding="utf-8")
    return p


def _existing_calibration(folder: Path) -> Path:
    (folder / "calibration.json").write_text('{"fitted": "last week"}\n', encoding="utf-8")
    return _table("concentration,response\n0,0.01\n1,0.5\n2,1.02\n4,1.98\n")(folder)


def _cli_calibrate_over(target: Path, folder: Path) -> list[str]:
    return ["calibrate", str(target), "--out", str(folder / "calibration.json"), "--quiet"]


def _disk_full_batch(folder: Path) -> Path:
    return good_manifest(folder / "data")


_GOOD_SPOT = {"number": 1, "shape": "circle", "x": 16, "y": 12, "radius": 4}

CASES: tuple[BadCase, ...] = (
    # ---------------------------------------------------------------- images
    BadCase("image-zero-byte", "images", "0-byte file named frame_0001.jpg",
            _file("frame_0001.jpg", b""), read_recording, InputFormatError, _cli_measure),
    BadCase("image-truncated-jpeg", "images", "JPEG cut at 60 % of its length (no EOI)",
            _truncated_jpeg, read_recording, InputFormatError, _cli_measure),
    BadCase("image-png-bad-crc", "images", "PNG whose IDAT chunk CRC-32 is wrong",
            _bad_crc_png, read_recording, InputFormatError, _cli_measure),
    BadCase("image-text-as-png", "images", "text file named frame_0001.png",
            _file("frame_0001.png", "exported by the plate reader\n"), read_recording,
            InputFormatError, _cli_measure),
    BadCase("image-bomb", "images", "PNG header claiming 200000x200000 pixels "
            "(decompression bomb)", _bomb, read_recording, InputFormatError, _cli_measure),
    BadCase("image-mixed-sizes", "images", "folder of a 32x24 and a 30x24 PNG",
            _folder_of(_gradient(), _gradient(H, W - 2)), read_recording, ShapeMismatchError,
            _cli_measure),
    BadCase("image-mixed-bit-depths", "images", "folder of an 8-bit and a 16-bit PNG",
            _folder_of(_gradient(), _gradient(dtype=np.uint16)), read_recording,
            ShapeMismatchError, _cli_measure),
    BadCase("image-mixed-grey-colour", "images", "folder of an RGB and a grey PNG",
            _folder_of(_gradient(), _gradient(colour=False)), read_recording,
            ShapeMismatchError, _cli_measure),
    BadCase("image-float-tiff", "images", "32-bit floating-point TIFF",
            _float_tiff, read_recording, InputFormatError, _cli_measure),
    BadCase("image-jpeg-as-dng", "images", "JPEG renamed IMG_0001.dng",
            _fake_dng, read_recording, InputFormatError, _cli_measure),
    BadCase("image-tiff-as-dng", "images", "plain 16-bit TIFF (no DNG tags) named .dng",
            _tiff_dng, read_recording, InputFormatError, _cli_measure),
    BadCase("image-unsupported-type", "images", "BMP image (frame_0001.bmp)",
            _file("frame_0001.bmp", b"BM" + bytes(60)), read_recording, InputFormatError,
            _cli_measure),
    BadCase("image-missing", "images", "path that does not exist",
            lambda folder: folder / "no_such_frame.jpg", read_recording, InputFormatError,
            _cli_measure),
    BadCase("image-folder-without-images", "images", "folder holding only notes.txt",
            _empty_folder, read_recording, InputFormatError, _cli_measure),
    BadCase("image-non-utf8-name-damaged", "images", "truncated JPEG whose name is not "
            "UTF-8 and has a space (b'r\\xe9sultat 1.jpg')", _non_utf8_damaged, read_recording,
            InputFormatError, _cli_measure),
    BadCase("image-odd-names", "images", "valid PNGs named 'frame 0001.png' and "
            "b'frame\\xe90002.png' in 'card 3 (pond)/'", _odd_names, read_recording, None),
    # ---------------------------------------------------------------- videos
    BadCase("video-zero-byte", "videos", "0-byte clip.mp4", _file("clip.mp4", b""),
            read_recording, InputFormatError, _cli_measure),
    BadCase("video-text-as-mp4", "videos", "text file named clip.mp4",
            _file("clip.mp4", "see the lab notebook, page 12\n" * 20), read_recording,
            InputFormatError, _cli_measure),
    BadCase("video-audio-only", "videos", "MP4 with an AAC audio stream and no video",
            lambda folder: write_audio_only(folder / "clip.mp4"), read_recording,
            InputFormatError, _cli_measure),
    BadCase("video-truncated", "videos", "H.264 MP4 cut in half (index lost)",
            _truncated_video, read_recording, InputFormatError, _cli_measure),
    BadCase("video-no-frames", "videos", "Matroska file with a video stream but no frames",
            lambda folder: write_empty_video_stream(folder / "clip.mkv"), read_recording,
            InputFormatError, _cli_measure),
    BadCase("video-backwards-timestamps", "videos", "MJPEG Matroska with frame times 0, "
            "0.1, 0.2, 0.15, 0.05 s", lambda folder: write_backwards_video(folder / "clip.mkv"),
            read_recording, InputFormatError, _cli_measure),
    BadCase("video-one-frame", "videos", "H.264 MP4 holding a single frame, measured with "
            "one spot given", _video(1), _measure_probe, None),
    # ---------------------------------------------------------------- spot files
    BadCase("spots-outside-frame", "spot files", "circle at x=100 px in a 32x24 frame",
            _spots("spots.json", _spot_doc([_GOOD_SPOT, {"number": 2, "shape": "circle",
                                                         "x": 100, "y": 10, "radius": 5}])),
            _spots_probe, SpotError, _cli_measure_spots),
    BadCase("spots-not-json", "spot files", "spots.json holding CSV text",
            _spots("spots.json", "x,y,r\n16,12,4\n"), _spots_probe, SpotError,
            _cli_measure_spots),
    BadCase("spots-negative-radius", "spot files", "circle with radius -4",
            _spots("spots.json", _spot_doc([{**_GOOD_SPOT, "radius": -4}])), _spots_probe,
            SpotError, _cli_measure_spots),
    BadCase("spots-future-version", "spot files", "spot file of format version 99",
            _spots("spots.json", _spot_doc([_GOOD_SPOT], version=99)), _spots_probe, SpotError,
            _cli_measure_spots),
    BadCase("spots-zero-byte", "spot files", "0-byte spots.json", _spots("spots.json", ""),
            _spots_probe, SpotError, _cli_measure_spots),
    BadCase("dark-size-mismatch", "dark frames", "dark frames of 30x24 for a "
            "32x24 recording", _dark_of_other_size, _measure_with(dark=True),
            ShapeMismatchError, _cli_measure_dark),
    BadCase("dark-folder-empty", "dark frames", "--dark folder holding only "
            "notes.txt", _empty_folder, _measure_with(dark=True), InputFormatError,
            _cli_measure_dark),
    BadCase("profile-missing", "device profiles", "--transfer profile= naming a "
            "file that is not there", lambda folder: folder / "phone.json",
            _measure_with(), InputFormatError, _cli_measure_profile),
    BadCase("profile-decreasing", "device profiles", "--transfer profile= whose "
            "red curve goes down", _profile_json({
                "schema": "ecl_quant.device_profile", "version": 1,
                "response": {"red": [0.0, 0.6, 0.4, 1.0]}}), _measure_with(),
            InputFormatError, _cli_measure_profile),
    BadCase("camera-levels-path-escape", "camera levels", "levels.csv row naming "
            "'../elsewhere.png'", _levels("flat_0.png,flat,0.01\n../elsewhere.png,flat,0.01\n"),
            _levels_probe, InputFormatError, _cli_camera, names="levels.csv"),
    BadCase("camera-levels-text-exposure", "camera levels", "levels.csv exposure_s 'fast'",
            _levels("flat_0.png,flat,0.01\nflat_1.png,flat,fast\n"), _levels_probe,
            InputFormatError, _cli_camera, names="levels.csv"),
    # ---------------------------------------------------------------- manifests
    BadCase("manifest-missing-column", "manifests", "no role column",
            _manifest("path,sample,concentration\nblank.png,b,0\nstd1.png,s1,1\n"),
            _manifest_probe, InputFormatError, _cli_batch("out")),
    BadCase("manifest-conflicting-roles", "manifests", "sample 'pond A' as blank on one row "
            "and standard on another",
            _manifest("path,sample,role,concentration\nblank.png,pond A,blank,0\n"
                      "std1.png,pond A,standard,1\nstd2.png,s2,standard,2\n"
                      "std4.png,s4,standard,4\n"),
            _manifest_probe, InputFormatError, _cli_batch("out")),
    BadCase("manifest-path-escape", "manifests", "row path '../elsewhere.png' leaving the "
            "manifest's folder", _escape_manifest, _manifest_probe, InputFormatError,
            _cli_batch("out")),
    BadCase("manifest-odd-file-names", "manifests", "recording folders named 'std 1' "
            "holding frames named 'frame 0001.png' and b'frame\\xe90002.png'",
            _odd_names_manifest, _manifest_key_probe, None),
    BadCase("manifest-symlink-escape", "manifests", "row path 'linked.png', a symbolic link "
            "to a file outside the manifest's folder", _symlink_escape_manifest,
            _manifest_probe, InputFormatError, _cli_batch("out")),
    BadCase("manifest-missing-file", "manifests", "row naming std3.png, which is not there",
            _manifest("path,sample,role,concentration\nblank.png,b,blank,0\n"
                      "std1.png,s1,standard,1\nstd2.png,s2,standard,2\n"
                      "std3.png,s3,standard,3\n"),
            _manifest_probe, InputFormatError, _cli_batch("out")),
    BadCase("manifest-not-utf8", "manifests", "manifest saved as Latin-1 ('r\\xe9plicat')",
            _manifest("path,sample,role,concentration\nblank.png,réplicat,blank,0\n"
                      .encode("latin-1")), _manifest_probe, InputFormatError,
            _cli_batch("out")),
    BadCase("manifest-zero-byte", "manifests", "0-byte manifest.csv", _manifest(b""),
            _manifest_probe, InputFormatError, _cli_batch("out")),
    BadCase("manifest-text-concentration", "manifests", "concentration 'one'",
            _manifest("path,sample,role,concentration\nblank.png,b,blank,0\n"
                      "std1.png,s1,standard,one\nstd2.png,s2,standard,2\n"
                      "std4.png,s4,standard,4\n"),
            _manifest_probe, InputFormatError, _cli_batch("out")),
    # ---------------------------------------------------------------- calibration tables
    BadCase("caltable-nan", "calibration tables", "response NaN on one standard",
            _table("concentration,response\n0,0.01\n1,0.5\n2,NaN\n4,2.0\n"), _table_probe,
            InputFormatError, _cli_calibrate),
    BadCase("caltable-text", "calibration tables", "concentration 'two' in one row",
            _table("concentration,response\n0,0.01\n1,0.5\ntwo,1.0\n4,2.0\n"), _table_probe,
            InputFormatError, _cli_calibrate),
    BadCase("caltable-negative", "calibration tables", "concentration -1",
            _table("concentration,response\n0,0.01\n-1,0.5\n2,1.0\n4,2.0\n"), _table_probe,
            CalibrationError, _cli_calibrate),
    BadCase("caltable-constant-response", "calibration tables", "every response 0.5",
            _table("concentration,response\n0,0.5\n1,0.5\n2,0.5\n4,0.5\n"), _table_probe,
            CalibrationError, _cli_calibrate),
    BadCase("caltable-one-level", "calibration tables", "every standard at 2 umol/L",
            _table("concentration,response\n2,0.9\n2,1.0\n2,1.1\n"), _table_probe,
            CalibrationError, _cli_calibrate),
    BadCase("caltable-zero-byte", "calibration tables", "0-byte standards.csv",
            _table(""), _table_probe, InputFormatError, _cli_calibrate),
    # ---------------------------------------------------------------- calibration JSON
    BadCase("caljson-hash-mismatch", "calibration JSON", "a fitted number edited by hand "
            "(sha256 no longer matches)", _calibration_with_stale_json, _caljson_probe,
            CalibrationError, _cli_quantify),
    BadCase("caljson-future-version", "calibration JSON", "format version 99 (re-hashed)",
            _tampered(lambda d: _rehash({**d, "version": 99})), _caljson_probe,
            CalibrationError, _cli_quantify),
    BadCase("caljson-extra-keys", "calibration JSON", "an added top-level key 'comment' "
            "(re-hashed)", _tampered(lambda d: _rehash({**d, "comment": "checked by JB"})),
            _caljson_probe, CalibrationError, _cli_quantify),
    BadCase("caljson-nan", "calibration JSON", "slope replaced by NaN",
            _tampered(lambda d: {**d, "parameters": {**d["parameters"], "slope": float("nan")}}),
            _caljson_probe, CalibrationError, _cli_quantify),
    BadCase("caljson-truncated", "calibration JSON", "calibration.json cut in half",
            lambda folder: _file("calibration.json", good_calibration_json(
                folder / "calibration.json").read_text(encoding="utf-8")[:200])(folder),
            _caljson_probe, InputFormatError, _cli_quantify),
    BadCase("caljson-spot-file", "calibration JSON", "a spot file given as the calibration",
            _file("calibration.json", _spot_doc([_GOOD_SPOT])), _caljson_probe,
            CalibrationError, _cli_quantify),
    # ---------------------------------------------------------------- device profiles
    BadCase("profile-not-json", "device profiles", "profile holding a Python pickle header",
            _file("phone.profile.json", b"\x80\x04\x95\x10\x00\x00\x00\x00\x00\x00\x00."),
            _profile_probe, InputFormatError),
    BadCase("profile-wrong-schema", "device profiles", "JSON that is not a device profile",
            _profile_json({"schema": "ecl_quant.device_profile", "version": 1,
                           "response": {"red": [0, 1]}}), _profile_probe, InputFormatError),
    # ---------------------------------------------------------------- outputs
    BadCase("output-readonly-folder", "outputs", "batch --out inside a folder without write "
            "permission", _readonly_out, _batch_probe("readonly/out"), OutputError,
            _cli_batch("readonly/out"), context=readonly_guard, names="readonly/out"),
    BadCase("output-disk-full", "outputs", "calibration.json rewritten while the disk is "
            "full (fsync fails with ENOSPC)", _disk_full_target, _save_cal_probe, OutputError,
            context=lambda folder: disk_full(), keep=("calibration.json",)),
    BadCase("output-disk-full-batch", "outputs", "batch while the disk is full",
            _disk_full_batch, _batch_probe("out"), OutputError, _cli_batch("out"),
            context=lambda folder: disk_full(), names="out/.ecl-quant.lock"),
    BadCase("output-not-empty", "outputs", "batch --out a folder holding other files, "
            "without --force", _existing_out, _batch_probe("results"), OutputError,
            _cli_batch("results"), keep=("results/summary.xlsx",), names="results"),
    BadCase("output-file-exists", "outputs", "calibrate --out naming an existing "
            "calibration.json, without --force", _existing_calibration,
            _subcommand_probe(_cli_calibrate_over), OutputError, _cli_calibrate_over,
            keep=("calibration.json",), names="calibration.json"),
    BadCase("output-is-a-file", "outputs", "batch --out naming an existing file",
            _out_is_file, _batch_probe("results"), OutputError, _cli_batch("results"),
            keep=("results",), names="results"),
)


# ============================================================== running

#: Names of scratch files an interrupted or failed write may leave behind.
LEFTOVER = re.compile(r"^\..*\.tmp$|\.partial-|\.old-")


@dataclass(frozen=True)
class Outcome:
    """What a case produced through the API.

    Attributes
    ----------
    kind : str
    error : str or None
        Class name of the exception (None when accepted).
    typed : bool
        Whether the exception is an EclQuantError (False: a defect).
    message : str
        The message with the scratch folder removed from paths, or the acceptance note.
    path : str or None
        The exception's ``path`` attribute, relative to the scratch folder.
    warnings : tuple of str
        Warning classes raised along the way.
    leftovers : tuple of str
        Temporary or partial files left in the scratch folder afterwards (must be none).
    changed : tuple of str
        Files of ``BadCase.keep`` whose content changed (must be none).
    exception : BaseException or None
    """

    kind: str
    error: str | None
    typed: bool
    message: str
    path: str | None
    warnings: tuple[str, ...] = ()
    leftovers: tuple[str, ...] = ()
    changed: tuple[str, ...] = ()
    exception: BaseException | None = None


def normalise(text: str, folder: Path) -> str:
    """Remove the scratch folder (as given and resolved) and volatile values from text."""
    for root in sorted({str(folder.resolve()), str(folder)}, key=len, reverse=True):
        text = text.replace(root + os.sep, "").replace(root, ".")
    text = text.replace(socket.gethostname(), "HOST")
    text = re.sub(r"pid \d+", "pid N", text)
    text = re.sub(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(?:[+-]\d\d:\d\d|Z)?", "TIME", text)
    return text


def leftovers(folder: Path) -> tuple[str, ...]:
    """Temporary/partial files under ``folder`` (relative names)."""
    return tuple(sorted(str(p.relative_to(folder)) for p in folder.rglob("*")
                        if LEFTOVER.search(p.name)))


def _snapshot(folder: Path, names: tuple[str, ...]) -> dict[str, bytes | None]:
    return {n: (folder / n).read_bytes() if (folder / n).is_file() else None for n in names}


def build(case: BadCase, folder: Path) -> Path:
    """Write the case's input inside ``folder`` (created) and return the target."""
    folder.mkdir(parents=True, exist_ok=True)
    return case.make(folder)


def fault(case: BadCase, folder: Path) -> contextlib.AbstractContextManager[Any]:
    """The case's simulated fault (or nothing)."""
    return case.context(folder) if case.context else contextlib.nullcontext()


def run_case(case: BadCase, folder: Path) -> Outcome:
    """Build the case's input in ``folder`` and run its API probe under its fault."""
    import warnings

    target = build(case, folder)
    before = _snapshot(folder, case.keep)
    error: BaseException | None = None
    note = ""
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        try:
            with fault(case, folder):
                note = case.probe(target, folder)
        except Exception as err:  # a non-EclQuantError is a defect: reported, never hidden
            error = err
    extra = {
        "warnings": tuple(sorted({w.category.__name__ for w in seen})),
        "leftovers": leftovers(folder),
        "changed": tuple(n for n, b in _snapshot(folder, case.keep).items() if b != before[n]),
    }
    if error is None:
        return Outcome(case.kind, None, True, f"accepted: {note}", None, **extra)
    if isinstance(error, EclQuantError):
        rel = normalise(error.path, folder) if error.path else None
        return Outcome(case.kind, type(error).__name__, True, normalise(str(error), folder), rel,
                       exception=error, **extra)
    return Outcome(case.kind, type(error).__name__, False,
                   normalise(f"{type(error).__name__}: {error}", folder), None,
                   exception=error, **extra)


def run_all(root: Path) -> dict[str, Outcome]:
    """Run every case in its own sub-folder of ``root``."""
    return {c.kind: run_case(c, root / c.kind) for c in CASES}


def cli_commands() -> set[str]:
    """Subcommands the CLI has now."""
    from ecl_quant.cli import build_parser

    parser = build_parser()
    for action in parser._actions:  # argparse has no public accessor for subparsers
        if isinstance(action, argparse._SubParsersAction):
            return set(action.choices)
    return set()


def _cell(text: str) -> str:
    # Names that are not UTF-8 carry surrogate escapes: show them as \\xNN.
    text = text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    one_line = " / ".join(part.strip() for part in text.splitlines() if part.strip())
    return one_line.replace("|", "\\|")


def render_table(outcomes: dict[str, Outcome]) -> str:
    """The Markdown document of docs/bad_inputs.md."""
    groups = sorted({c.group for c in CASES}, key=[c.group for c in CASES].index)
    lines = [
        "# Bad inputs and the messages they get",
        "",
        "Generated from the test corpus (`tests/badcorpus.py`); do not edit by hand. "
        f"Regenerate with `{TABLE_COMMAND}`. `tests/test_bad_inputs.py` fails when this file "
        "differs from what the corpus produces.",
        "",
        "Every bad input raises a subclass of `ecl_quant.errors.EclQuantError` with the file "
        "in `path`. The command line prints `error: <message>` on stderr and exits with code "
        "2 (1 for a batch that finished with some recordings failed), with no traceback "
        "unless `--debug`; a manifest with several problems lists them on the lines after. "
        "Outputs are written atomically (temporary file, then rename), so a failure never "
        "leaves a half-written file, and an existing output is replaced only with `--force` "
        "(a batch folder is reused for resuming). Paths in the messages are shown relative to "
        "the folder the input was in.",
        "",
        f"{len(CASES)} kinds in {len(groups)} groups: {', '.join(groups)}.",
        "",
        "| kind | group | input | error | message |",
        "|---|---|---|---|---|",
    ]
    for c in CASES:
        o = outcomes[c.kind]
        err = f"`{o.error}`" if o.error else "none (valid input)"
        if o.error and not o.typed:
            err += " **untyped: defect**"
        lines.append(f"| `{c.kind}` | {c.group} | {_cell(c.what)} | {err} | {_cell(o.message)} |")
    return "\n".join(lines) + "\n"


def generate_table() -> str:
    """Run the whole corpus in a scratch folder and return the Markdown table."""
    with tempfile.TemporaryDirectory(prefix="ecl-bad-") as tmp:
        return render_table(run_all(Path(tmp)))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Generate or check docs/bad_inputs.md.")
    parser.add_argument("--write-table", metavar="PATH", help="write the Markdown table here")
    parser.add_argument("--check", metavar="PATH", help="exit 1 when PATH differs")
    args = parser.parse_args(argv)
    text = generate_table()
    if args.write_table:
        Path(args.write_table).write_text(text, encoding="utf-8")
        print(f"wrote {args.write_table} ({len(CASES)} kinds)")
    if args.check:
        have = Path(args.check).read_text(encoding="utf-8") if Path(args.check).exists() else ""
        if have != text:
            print(f"{args.check} is out of date; run {TABLE_COMMAND}", file=sys.stderr)
            return 1
    if not (args.write_table or args.check):
        sys.stdout.write(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
