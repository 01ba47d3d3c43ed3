"""Benchmark inputs, made once by the project's simulator and cached.

One call of :func:`prepare` writes, under ``<cache>/<config name>-<key>/``:

``short.mp4``, ``long.mp4``
    BT.709 H.264 recordings of the eight-spot card (about 600 and 3000 frames at
    1080p for the full configuration). The first ``n_unique`` frames are rendered one
    by one (they hold the whole ECL pulse); the rest of each recording cycles back and
    forth over the last ``n_tail`` of them, so the recording keeps going after the
    pulse with fresh-looking noise while the simulator renders only a few hundred
    frames. The first frames of the two recordings are the same.
``stills/``
    JPEG stills of the same card with EXIF capture times (same scheme of rendered and
    cycled frames).
``spots.json``
    The card's spots in the project's spot-file format (the simulator's true centres),
    for "measure with spots given".
``batch/manifest.csv``
    A manifest of many small recordings (JPEG bursts and H.264 videos alternating) with
    standards, blanks and pond-water unknowns, plus ``batch/truth.csv`` (the
    simulator's exact spot integrals).
``calibration_table.csv``
    Standards, blanks and unknowns with responses taken from the simulator's exact
    integrals plus 3 % Gaussian reading noise, for the calibration benchmark.
``inputs.json``
    What was made, written last: a folder without it is incomplete and made again.

Nothing here is a real measurement: the scenario is the invented Tern Lake Hatchery
card of the demo.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import shutil
import time
from collections.abc import Iterator
from dataclasses import asdict, dataclass, replace
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

#: Bump when the way inputs are made changes (invalidates the cache).
INPUTS_VERSION = 2

#: Longest key-frame interval of the benchmark videos, s. Phone camera encoders write a
#: key frame about every second (x264's default would allow up to 250 frames).
VIDEO_GOP_S = 1.0

#: Encoder preset of the benchmark videos: High profile, CABAC, B-frames (like a phone's
#: hardware encoder), fast enough to make 3600 frames of 1080p in about a minute.
VIDEO_PRESET = "superfast"

STANDARD_LEVELS = (0.0, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0)
# Invented pond-water unknowns of the demo scenario, micromol/L.
UNKNOWN_LEVELS = {"pond-1-inlet": 3.6, "pond-2-outlet": 8.4, "pond-3-rearing": 14.5,
                  "pond-4-rearing": 27.0, "pond-5-settling": 6.2}


@dataclass(frozen=True)
class BenchConfig:
    """Sizes of the benchmark inputs.

    Attributes
    ----------
    name : str
    size : (int, int)
        (H, W) of the long/short recordings and the stills.
    fps : float
    short_frames, long_frames : int
        Frames of the two recordings.
    n_unique : int
        Frames rendered one by one (must cover the pulse).
    n_tail : int
        Frames cycled after that.
    n_stills : int
    radius_px, spacing_px : float
        Spot radius and centre spacing of the 2 x 4 card.
    bitrate : int
        Video bit rate, bit/s.
    batch_recordings : int
    batch_size : (int, int)
    batch_frames : int
    batch_radius_px, batch_spacing_px : float
    bootstrap_draws : int
    repeats : int
        Times each timed pair (baseline, pipeline) is run back to back; a ratio is the
        median over the pairs (the best run of each side is kept for the detail).
    batch_repeats : int
        The same for the batch pair (1 worker, 2 workers), the slowest part.
    """

    name: str
    size: tuple[int, int]
    fps: float
    short_frames: int
    long_frames: int
    n_unique: int
    n_tail: int
    n_stills: int
    radius_px: float
    spacing_px: float
    bitrate: int
    batch_recordings: int
    batch_size: tuple[int, int]
    batch_frames: int
    batch_radius_px: float
    batch_spacing_px: float
    bootstrap_draws: int = 2000
    repeats: int = 2
    batch_repeats: int = 1

    def key(self) -> str:
        """Short hash of everything that decides the inputs."""
        from ecl_quant import __version__
        from ecl_quant.simulate import SIMULATOR_VERSION

        doc = {k: v for k, v in asdict(self).items() if k not in ("repeats", "batch_repeats")}
        doc.update(inputs=INPUTS_VERSION, simulator=SIMULATOR_VERSION, preset=VIDEO_PRESET,
                   gop_s=VIDEO_GOP_S, ecl_quant=__version__)
        text = json.dumps(doc, sort_keys=True)
        return hashlib.sha256(text.encode()).hexdigest()[:10]


CONFIGS: dict[str, BenchConfig] = {
    # The inputs: 1080p, ~600 and ~3000 frames, 300 stills, 40 recordings.
    "full": BenchConfig(
        name="full", size=(1080, 1920), fps=30.0, short_frames=600, long_frames=3000,
        n_unique=210, n_tail=30, n_stills=300, radius_px=48.0, spacing_px=240.0,
        bitrate=16_000_000, batch_recordings=40, batch_size=(480, 640), batch_frames=60,
        batch_radius_px=22.0, batch_spacing_px=120.0, repeats=3),
    # Smoke check: small frames, short recordings.
    "quick": BenchConfig(
        name="quick", size=(240, 320), fps=30.0, short_frames=100, long_frames=300,
        n_unique=60, n_tail=20, n_stills=30, radius_px=12.0, spacing_px=60.0,
        bitrate=2_000_000, batch_recordings=6, batch_size=(120, 160), batch_frames=24,
        batch_radius_px=7.0, batch_spacing_px=34.0, repeats=1),
    # Unit-test size (tests/test_benchmarks_smoke.py).
    "tiny": BenchConfig(
        name="tiny", size=(96, 128), fps=10.0, short_frames=24, long_frames=48,
        n_unique=20, n_tail=6, n_stills=8, radius_px=6.0, spacing_px=26.0,
        bitrate=500_000, batch_recordings=2, batch_size=(96, 128), batch_frames=16,
        batch_radius_px=6.0, batch_spacing_px=26.0, bootstrap_draws=200, repeats=1),
}


@dataclass(frozen=True)
class Inputs:
    """Paths of the prepared inputs (see the module docstring)."""

    folder: Path
    short_video: Path
    long_video: Path
    stills: Path
    spots: Path
    manifest: Path
    calibration_table: Path
    description: dict[str, Any]


def _card_spec(cfg: BenchConfig, *, encoding: str, n_frames: int) -> Any:
    from ecl_quant.simulate import SimulationSpec

    return SimulationSpec(
        size=cfg.size, n_rows=2, n_cols=4, radius_px=cfg.radius_px, spacing_px=cfg.spacing_px,
        edge_px=0.45, onset_s=min(1.0, 0.2 * cfg.n_unique / cfg.fps), rise_s=0.35,
        decay_s=1.1, n_frames=n_frames, fps=cfg.fps,
        exposure_s=1.0 / 30.0, gain_e_per_fs=4000.0, shot_noise="gaussian",
        read_noise_fs=0.0012, dark_level_fs=0.004, ambient_fs=0.02, n_hot_pixels=4,
        drift_px=0.0, encoding=encoding, jpeg_quality=90, jpeg_subsampling="4:2:0",
        crf=None, bitrate=cfg.bitrate, video_preset=VIDEO_PRESET, seed=11)


def _cycled(frames: Iterator[NDArray[Any]], n_unique: int, n_tail: int, n_total: int,
            convert: Any) -> Iterator[Any]:
    """``convert`` of each rendered frame, then of the last ``n_tail`` back and forth."""
    pool: list[Any] = []
    count = 0
    for i, lin in enumerate(frames):
        out = convert(lin)
        if i >= n_unique - n_tail:
            pool.append(out)
        yield out
        count += 1
        if count == n_total:
            return
    if len(pool) < 2:
        pool = pool * 2
    # Back and forth (..., p[n-2], p[n-1], p[n-2], ..., p[0], p[1], ...): no jump in drift.
    order = list(range(len(pool) - 2, 0, -1)) + list(range(0, len(pool) - 1))
    k = 0
    while count < n_total:
        yield pool[order[k % len(order)]]
        k += 1
        count += 1


def _write_videos(cfg: BenchConfig, targets: dict[Path, int]) -> dict[str, Any]:
    """Encode the card to several lengths in one pass of the simulator (BT.709 H.264)."""
    import av

    from ecl_quant.simulate import _ycbcr709_limited, render_linear_frames

    spec = _card_spec(cfg, encoding="h264", n_frames=cfg.n_unique)
    h, w = cfg.size
    time_base = Fraction(1, 600)
    step = int(round(600 / cfg.fps))
    n_max = max(targets.values())
    outs = []
    for path, n in targets.items():
        tmp = path.with_suffix(".partial.mp4")
        container = av.open(str(tmp), mode="w", format="mp4")
        stream = container.add_stream("libx264", rate=Fraction(cfg.fps).limit_denominator(1001))
        stream.width, stream.height = w, h
        stream.pix_fmt = "yuv420p"
        stream.time_base = time_base
        cc = stream.codec_context
        cc.time_base = time_base
        cc.colorspace = cc.color_primaries = cc.color_trc = 1  # BT.709 (H.273)
        cc.color_range = 1  # limited (MPEG) range
        stream.bit_rate = cfg.bitrate
        stream.options = {"preset": VIDEO_PRESET,
                          "g": str(max(1, int(round(VIDEO_GOP_S * cfg.fps))))}
        outs.append((path, tmp, n, container, stream))

    def to_frame(lin: NDArray[np.float32]) -> Any:
        y, cb, cr = _ycbcr709_limited(lin)
        return np.concatenate([y.ravel(), cb.ravel(), cr.ravel()]).reshape(h * 3 // 2, w)

    frames = _cycled(render_linear_frames(spec), cfg.n_unique, cfg.n_tail, n_max, to_frame)
    try:
        for i, packed in enumerate(frames):
            for _path, _tmp, n, container, stream in outs:
                if i >= n:
                    continue
                fr = av.VideoFrame.from_ndarray(packed, format="yuv420p")
                fr.colorspace = 1
                fr.color_range = 1
                fr.pts = i * step
                fr.time_base = time_base
                for packet in stream.encode(fr):
                    container.mux(packet)
        for _path, _tmp, _n, container, stream in outs:
            for packet in stream.encode(None):
                container.mux(packet)
    finally:
        for _path, _tmp, _n, container, _stream in outs:
            container.close()
    for path, tmp, _n, _c, _s in outs:
        tmp.replace(path)
    return {"codec": "libx264", "preset": VIDEO_PRESET, "bitrate": cfg.bitrate,
            "gop_frames": max(1, int(round(VIDEO_GOP_S * cfg.fps))),
            "pix_fmt": "yuv420p", "matrix": "bt709", "range": "limited",
            "time_base": "1/600", "fps": cfg.fps}


def _write_stills(cfg: BenchConfig, folder: Path) -> None:
    from ecl_quant.simulate import _write_stills as write_stills
    from ecl_quant.simulate import render_linear_frames

    spec = _card_spec(cfg, encoding="jpeg", n_frames=cfg.n_stills)
    rendered = render_linear_frames(replace(spec, n_frames=min(cfg.n_unique, cfg.n_stills)))
    frames = _cycled(rendered, min(cfg.n_unique, cfg.n_stills), cfg.n_tail, cfg.n_stills,
                     lambda a: a)
    times = np.arange(cfg.n_stills) / cfg.fps
    exposures = np.full(cfg.n_stills, spec.exposure_s)
    tmp = folder.with_name(folder.name + ".partial")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir(parents=True)
    write_stills(tmp, spec, frames, times, exposures, "frame")
    tmp.replace(folder)


def _write_spots(cfg: BenchConfig, path: Path) -> None:
    from ecl_quant.spots import SpotSet, make_spot, save_spots

    spec = _card_spec(cfg, encoding="h264", n_frames=cfg.n_unique)
    xs, ys = spec.spot_centres()
    r = cfg.radius_px + 2.0
    spot_set = SpotSet(tuple(make_spot(k + 1, "circle", (float(x), float(y), r))
                             for k, (x, y) in enumerate(zip(xs, ys))),
                       frame_shape=cfg.size,
                       provenance={"source": "benchmark: simulator's true spot centres"})
    save_spots(spot_set, path)


def _batch_cards(cfg: BenchConfig) -> list[dict[str, Any]]:
    """Per recording: path, encoding, the eight spots' (sample, role, conc, true conc)."""
    names = list(UNKNOWN_LEVELS)
    cards = []
    for k in range(cfg.batch_recordings):
        level = STANDARD_LEVELS[k % len(STANDARD_LEVELS)]
        unk = names[k % len(names)]
        encoding = "jpeg" if k % 2 == 0 else "h264"
        spots = ([(f"STD-{level:g}", "standard", level, level)] * 4
                 + [(f"BLANK-{k + 1:02d}", "blank", None, 0.0)] * 2
                 + [(unk, "unknown", None, UNKNOWN_LEVELS[unk])] * 2)
        name = f"card-{k + 1:02d}"
        cards.append({"name": name, "encoding": encoding, "spots": spots,
                      "path": f"{name}.mp4" if encoding == "h264" else name})
    return cards


def _write_batch(cfg: BenchConfig, folder: Path) -> list[dict[str, Any]]:
    from ecl_quant.scenario import ResponseModel
    from ecl_quant.simulate import SimulationSpec, simulate_recording

    tmp = folder.with_name(folder.name + ".partial")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir(parents=True)
    model = ResponseModel()
    truth_rows: list[dict[str, Any]] = []
    manifest = io.StringIO()
    writer = csv.writer(manifest, lineterminator="\n")
    writer.writerow(["path", "sample", "role", "concentration", "spot", "notes"])
    for k, card in enumerate(_batch_cards(cfg)):
        amps = tuple(model.amplitude(true) for (_s, _r, _c, true) in card["spots"])
        spec = SimulationSpec(
            size=cfg.batch_size, n_rows=2, n_cols=4, radius_px=cfg.batch_radius_px,
            spacing_px=cfg.batch_spacing_px, edge_px=0.45, amplitudes=amps, onset_s=0.6,
            rise_s=0.35, decay_s=1.1, n_frames=cfg.batch_frames, fps=10.0,
            shot_noise="gaussian", read_noise_fs=0.0012, drift_px=0.4,
            encoding=card["encoding"], jpeg_quality=90, crf=14, video_preset=VIDEO_PRESET,
            start_time=f"2024-06-0{3 + k % 5}T{8 + k % 10:02d}:15:00", seed=500 + k)
        truth = simulate_recording(tmp / card["path"], spec)
        groups: dict[str, list[int]] = {}
        meta: dict[str, tuple[str, float | None]] = {}
        for number, (sample, role, conc, true) in enumerate(card["spots"], start=1):
            groups.setdefault(sample, []).append(number)
            meta[sample] = (role, conc)
            st = truth.spots[number - 1]
            truth_rows.append({"recording": card["path"], "spot": number, "sample": sample,
                               "role": role, "true_concentration": true,
                               "amplitude_fs": st.amplitude_fs, "integral": st.integral})
        for sample, numbers in groups.items():
            role, conc = meta[sample]
            writer.writerow([card["path"], sample, role, "" if conc is None else f"{conc:g}",
                             f"{numbers[0]}-{numbers[-1]}", "benchmark card"])
    (tmp / "manifest.csv").write_text(manifest.getvalue(), encoding="utf-8")
    with open(tmp / "truth.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(truth_rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(truth_rows)
    if folder.exists():
        shutil.rmtree(folder)
    tmp.replace(folder)
    return truth_rows


def _write_calibration_table(truth_rows: list[dict[str, Any]], path: Path) -> None:
    """A full standard series (triplicates), blanks and the unknowns, one row per reading.

    Responses are the simulator's exact integral for a spot of the batch cards at the
    amplitude of each concentration (the integral is proportional to the amplitude),
    times (1 + 3 % Gaussian reading noise), seeded.
    """
    from ecl_quant.scenario import ResponseModel

    model = ResponseModel()
    per_amplitude = float(truth_rows[0]["integral"]) / float(truth_rows[0]["amplitude_fs"])
    rng = np.random.default_rng(2024)
    readings: list[tuple[str, str, float | str, float]] = []
    for level in STANDARD_LEVELS:
        readings += [(f"STD-{level:g}", "standard", level, level)] * 3
    readings += [("BLANK", "blank", 0.0, 0.0)] * 4
    for name, level in UNKNOWN_LEVELS.items():
        readings += [(name, "unknown", "", level)] * 3
    rows = []
    for sample, role, conc, true in readings:
        y = per_amplitude * model.amplitude(true) * (1.0 + 0.03 * rng.standard_normal())
        rows.append({"sample": sample, "role": role, "concentration": conc, "response": y})
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=["sample", "role", "concentration", "response"],
                           lineterminator="\n")
        w.writeheader()
        w.writerows(rows)


def prepare(cfg: BenchConfig, cache: Path, *, log: Any = print) -> Inputs:
    """Make the inputs of ``cfg`` under ``cache`` unless a complete set is there.

    Parameters
    ----------
    cfg : BenchConfig
    cache : Path
        Cache root (``benchmarks/.cache``).
    log : callable
        Receives progress lines.

    Returns
    -------
    Inputs
    """
    folder = Path(cache) / f"{cfg.name}-{cfg.key()}"
    stamp = folder / "inputs.json"
    paths = dict(short_video=folder / "short.mp4", long_video=folder / "long.mp4",
                 stills=folder / "stills", spots=folder / "spots.json",
                 manifest=folder / "batch" / "manifest.csv",
                 calibration_table=folder / "calibration_table.csv")
    if stamp.is_file():
        doc = json.loads(stamp.read_text(encoding="utf-8"))
        return Inputs(folder=folder, description=doc, **paths)
    folder.mkdir(parents=True, exist_ok=True)
    t_all = time.perf_counter()
    timings: dict[str, float] = {}
    t = time.perf_counter()
    log(f"preparing inputs in {folder} (once; later runs reuse them)")
    _write_spots(cfg, paths["spots"])
    log(f"  videos: {cfg.short_frames} and {cfg.long_frames} frames of "
        f"{cfg.size[1]}x{cfg.size[0]} H.264 ...")
    video = _write_videos(cfg, {paths["short_video"]: cfg.short_frames,
                                paths["long_video"]: cfg.long_frames})
    timings["videos_s"] = time.perf_counter() - t
    t = time.perf_counter()
    log(f"  stills: {cfg.n_stills} JPEG ...")
    _write_stills(cfg, paths["stills"])
    timings["stills_s"] = time.perf_counter() - t
    t = time.perf_counter()
    log(f"  batch: {cfg.batch_recordings} recordings of {cfg.batch_size[1]}x"
        f"{cfg.batch_size[0]} ...")
    truth_rows = _write_batch(cfg, folder / "batch")
    timings["batch_s"] = time.perf_counter() - t
    _write_calibration_table(truth_rows, paths["calibration_table"])
    timings["total_s"] = time.perf_counter() - t_all
    doc = {
        "config": asdict(cfg), "key": cfg.key(), "video": video,
        "scenario": "Tern Lake Hatchery eight-spot card (invented; simulated)",
        "frames": {"rendered": cfg.n_unique, "cycled_tail": cfg.n_tail},
        "preparation_s": timings,
    }
    stamp.write_text(json.dumps(doc, indent=2), encoding="utf-8")
    log(f"  inputs ready in {timings['total_s']:.0f} s")
    return Inputs(folder=folder, description=doc, **paths)
