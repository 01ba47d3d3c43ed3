"""Speed and memory of the pipeline against bare decoding (``make bench``).

Usage::

    python benchmarks/run.py            # full inputs (1080p; made once, then cached)
    python benchmarks/run.py --quick    # small inputs, a smoke check

Every figure is measured in this one run, side by side with its baseline, and printed
as a ratio; all of them go to ``benchmarks/results.json`` with the machine's core count
and the library versions. Inputs are made by the project's simulator and cached in
``benchmarks/.cache`` (see :mod:`benchmarks.inputs`). Timed pairs are run ``repeats``
times, interleaved; a speed ratio is the median over the pairs of pipeline / baseline
measured back to back (the machine's speed drifts over minutes), and the best run of
each side is kept in the detail.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import subprocess
import sys
import time
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from benchmarks import figures as fig  # noqa: E402
from benchmarks.inputs import CONFIGS, Inputs, prepare  # noqa: E402

GROUPS = ("video", "stills", "memory", "batch", "calibration")


@dataclass(frozen=True)
class Target:
    """A figure's goal: ``value op limit`` (op is ">=" or "<=")."""

    op: str
    limit: float

    def met(self, value: float | None) -> bool | None:
        if value is None or not math.isfinite(value):
            return None
        return value >= self.limit if self.op == ">=" else value <= self.limit

    def text(self) -> str:
        return f"{self.op} {self.limit:g}"


# The targets (2-core machine, ratios measured in one run).
TARGETS: dict[str, Target] = {
    "video_spots_ratio": Target(">=", 0.85),
    "video_detect_ratio": Target(">=", 0.45),
    "stills_ratio": Target(">=", 0.80),
    "memory_short_mb": Target("<=", 400.0),
    "memory_long_mb": Target("<=", 400.0),
    "memory_growth": Target("<=", 1.10),
    "batch_speedup": Target(">=", 1.70),
    "bootstrap_s": Target("<=", 1.0),
}

LABELS: dict[str, str] = {
    "video_spots_ratio": "measure, spots given / bare decode (fps)",
    "video_detect_ratio": "measure, spot detection / bare decode (fps)",
    "stills_ratio": "JPEG folder measure / bare image reading (fps)",
    "memory_short_mb": "peak RSS, measure, short recording (MiB)",
    "memory_long_mb": "peak RSS, measure, long recording (MiB)",
    "memory_growth": "peak RSS long / short",
    "video_dark_ratio": "measure, spots given, master dark / bare decode (fps)",
    "batch_speedup": "batch wall time, 1 worker / 2 workers",
    "bootstrap_s": "calibrate + 2000-draw bootstrap (s)",
}


@dataclass
class Report:
    """Figures collected so far, and the raw runs behind them."""

    figures: dict[str, dict[str, Any]] = field(default_factory=dict)
    runs: dict[str, Any] = field(default_factory=dict)
    errors: dict[str, str] = field(default_factory=dict)

    def put(self, name: str, value: float | None, **detail: Any) -> None:
        target = TARGETS.get(name)
        entry: dict[str, Any] = {"label": LABELS.get(name, name), "value": value, **detail}
        if target is not None:
            entry["target"] = target.text()
            entry["met"] = target.met(value)
        self.figures[name] = entry


def _clean(obj: Any) -> Any:
    """Non-finite floats -> None (strict JSON), recursively."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    return obj


def _best(timings: Sequence[fig.Timing]) -> fig.Timing:
    return max(timings, key=lambda t: t.fps)


def _paired(pipeline: Sequence[fig.Timing], baseline: Sequence[fig.Timing]) -> float:
    """Median over repeats of pipeline fps / baseline fps of the pairs run back to back.

    The machine's speed drifts between runs (seen here: bare JPEG reading at 125 to 178
    files/s within minutes), so a ratio of two best-of values taken minutes apart
    scatters more than the ratio within a pair.
    """
    ratios = [_ratio(p.fps, b.fps) for p, b in zip(pipeline, baseline)]
    ratios = [r for r in ratios if math.isfinite(r)]
    if not ratios:
        return math.nan
    ratios.sort()
    mid = len(ratios) // 2
    return ratios[mid] if len(ratios) % 2 else 0.5 * (ratios[mid - 1] + ratios[mid])


def _ratio(a: float, b: float) -> float:
    return a / b if b > 0 and math.isfinite(a) and math.isfinite(b) else math.nan


def bench_video(inp: Inputs, repeats: int, rep: Report, log: Callable[[str], None]) -> None:
    """Measure (spots given, detection) vs bare decode of the short recording."""
    src = inp.short_video
    fig.bare_decode(src)  # warm the page cache and the decoder's libraries
    fig.warm_up(inp.stills, inp.spots)
    bare: list[fig.Timing] = []
    spots: list[fig.Timing] = []
    detect: list[fig.Timing] = []
    dark: list[fig.Timing] = []
    master = fig.simulated_master_dark(fig.video_shape(src))
    for i in range(repeats):
        bare.append(fig.bare_decode(src))
        log(f"  [{i + 1}/{repeats}] bare decode      {bare[-1].fps:8.1f} fps")
        spots.append(fig.run_measure(src, spots=inp.spots)[0])
        log(f"  [{i + 1}/{repeats}] measure, spots   {spots[-1].fps:8.1f} fps")
        detect.append(fig.run_measure(src, spots=None)[0])
        log(f"  [{i + 1}/{repeats}] measure, detect  {detect[-1].fps:8.1f} fps")
        dark.append(fig.run_measure(src, spots=inp.spots, dark=master)[0])
        log(f"  [{i + 1}/{repeats}] measure, dark    {dark[-1].fps:8.1f} fps")
    b, s, d, k = _best(bare), _best(spots), _best(detect), _best(dark)
    rep.runs["video"] = {"source": str(src), "bare_decode": [t.to_dict() for t in bare],
                         "measure_spots": [t.to_dict() for t in spots],
                         "measure_detect": [t.to_dict() for t in detect],
                         "measure_dark": [t.to_dict() for t in dark],
                         "thread_type": fig.video_thread_type()}
    # cpu_ratio: baseline CPU s / pipeline CPU s (all threads); less disturbed than wall
    # time when other processes share the machine, shown for context only.
    rep.put("video_spots_ratio", _paired(spots, bare), pipeline_fps=s.fps, baseline_fps=b.fps,
            best_ratio=_ratio(s.fps, b.fps), frames=s.frames, cpu_ratio=_ratio(b.cpu_s, s.cpu_s))
    rep.put("video_detect_ratio", _paired(detect, bare), pipeline_fps=d.fps, baseline_fps=b.fps,
            best_ratio=_ratio(d.fps, b.fps), frames=d.frames, cpu_ratio=_ratio(b.cpu_s, d.cpu_s))
    # No target: with a master dark every pixel's value is its own, so the code tables
    # and histograms do not apply (shown so that this path's cost stays in view).
    rep.put("video_dark_ratio", _paired(dark, bare), pipeline_fps=k.fps, baseline_fps=b.fps,
            frames=k.frames, cpu_ratio=_ratio(b.cpu_s, k.cpu_s))


def bench_stills(inp: Inputs, repeats: int, rep: Report, log: Callable[[str], None]) -> None:
    """Measure a JPEG folder (spots given) vs bare reading of its files."""
    src = inp.stills
    fig.bare_read_stills(src)
    fig.warm_up(inp.stills, inp.spots)
    bare: list[fig.Timing] = []
    meas: list[fig.Timing] = []
    for i in range(repeats):
        bare.append(fig.bare_read_stills(src))
        log(f"  [{i + 1}/{repeats}] bare reading     {bare[-1].fps:8.1f} files/s")
        meas.append(fig.run_measure(src, spots=inp.spots)[0])
        log(f"  [{i + 1}/{repeats}] measure, spots   {meas[-1].fps:8.1f} files/s")
    b, m = _best(bare), _best(meas)
    rep.runs["stills"] = {"source": str(src), "bare_read": [t.to_dict() for t in bare],
                          "measure_spots": [t.to_dict() for t in meas]}
    rep.put("stills_ratio", _paired(meas, bare), pipeline_fps=m.fps, baseline_fps=b.fps,
            best_ratio=_ratio(m.fps, b.fps), frames=m.frames, cpu_ratio=_ratio(b.cpu_s, m.cpu_s))


def bench_memory(inp: Inputs, rep: Report, log: Callable[[str], None]) -> None:
    """Peak RSS of measure (detection) on the short and long recordings, in children."""
    floor = fig.peak_memory("import", inp.short_video)
    log(f"  imports only              {floor['peak_rss_mb']:8.1f} MiB")
    dec = fig.peak_memory("decode", inp.short_video)
    log(f"  bare decode, short        {dec['peak_rss_mb']:8.1f} MiB")
    short = fig.peak_memory("measure", inp.short_video)
    log(f"  measure, short ({short['frames']} fr)  {short['peak_rss_mb']:8.1f} MiB")
    long = fig.peak_memory("measure", inp.long_video)
    log(f"  measure, long ({long['frames']} fr)  {long['peak_rss_mb']:8.1f} MiB")
    rep.runs["memory"] = {"import_only": floor, "bare_decode_short": dec,
                          "measure_short": short, "measure_long": long,
                          "mode": "spot detection (two passes), default settings"}
    rep.put("memory_short_mb", short["peak_rss_mb"], frames=short["frames"],
            baseline_mb=dec["peak_rss_mb"], imports_mb=floor["peak_rss_mb"])
    rep.put("memory_long_mb", long["peak_rss_mb"], frames=long["frames"],
            imports_mb=floor["peak_rss_mb"])
    rep.put("memory_growth", _ratio(long["peak_rss_mb"], short["peak_rss_mb"]),
            frames_ratio=_ratio(long["frames"], short["frames"]))


def bench_batch(inp: Inputs, repeats: int, rep: Report, log: Callable[[str], None],
                scratch: Path) -> None:
    """Batch on the manifest with 1 and with 2 workers (wall time), interleaved."""
    ones: list[fig.Timing] = []
    twos: list[fig.Timing] = []
    for i in range(repeats):
        ones.append(fig.run_batch(inp.manifest, workers=1, scratch=scratch))
        log(f"  [{i + 1}/{repeats}] 1 worker        {ones[-1].wall_s:8.1f} s "
            f"({ones[-1].frames} recordings)")
        twos.append(fig.run_batch(inp.manifest, workers=2, scratch=scratch))
        log(f"  [{i + 1}/{repeats}] 2 workers       {twos[-1].wall_s:8.1f} s")
    one, two = _best(ones), _best(twos)
    rep.runs["batch"] = {"manifest": str(inp.manifest),
                         "workers_1": [t.to_dict() for t in ones],
                         "workers_2": [t.to_dict() for t in twos]}
    # cores_1 / cores_2: cores the runs kept busy (machine-wide CPU time / wall time).
    # One worker already decodes on several threads, so cores_1 > 1 and the speed-up
    # cannot exceed about cores_2 / cores_1.
    rep.put("batch_speedup", _ratio(one.wall_s, two.wall_s), wall_1_s=one.wall_s,
            wall_2_s=two.wall_s, recordings=one.frames, cores_1=one.cores,
            cores_2=two.cores)


def bench_calibration(inp: Inputs, n_draws: int, rep: Report,
                      log: Callable[[str], None]) -> None:
    """Calibration fit + bootstrap of every unknown."""
    fig.run_calibration(inp.calibration_table, n_draws=100)  # imports, caches
    res = fig.run_calibration(inp.calibration_table, n_draws=n_draws)
    log(f"  fit ({res['model']})       {res['fit_s']:8.3f} s; bootstrap of "
        f"{res['n_unknown_samples']} unknowns x {n_draws} draws {res['bootstrap_s']:.3f} s")
    rep.runs["calibration"] = res
    rep.put("bootstrap_s", res["total_s"], fit_s=res["fit_s"], bootstrap_s=res["bootstrap_s"],
            n_draws=n_draws, model=res["model"])


def profile_measure(inp: Inputs, cache: Path, log: Callable[[str], None]) -> dict[str, str]:
    """pyinstrument call trees of measure on the short recording (``--profile``)."""
    from pyinstrument import Profiler

    fig.warm_up(inp.stills, inp.spots)
    out: dict[str, str] = {}
    for mode, spots in (("spots", inp.spots), ("detect", None)):
        prof = Profiler(interval=0.002)
        prof.start()
        fig.run_measure(inp.short_video, spots=spots)
        prof.stop()
        path = cache / f"profile-{inp.folder.name}-{mode}.txt"
        path.write_text(prof.output_text(unicode=False, color=False), encoding="utf-8")
        log(f"  measure ({mode}): {path}")
        out[mode] = str(path)
    return out


# ------------------------------------------------------------------ environment


def _versions() -> dict[str, Any]:
    from importlib import metadata

    out: dict[str, Any] = {"python": platform.python_version()}
    for dist in ("ecl_quant", "numpy", "scipy", "pandas", "opencv-python-headless", "av",
                 "Pillow", "scikit-image", "statsmodels", "dask", "psutil"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            continue
    try:
        import av

        out["ffmpeg"] = {k: ".".join(map(str, v)) for k, v in av.library_versions.items()}
    except Exception:  # pragma: no cover - informational only
        pass
    try:
        out["git_commit"] = subprocess.run(
            ["git", "rev-parse", "HEAD"], cwd=REPO, capture_output=True, text=True,
            check=True).stdout.strip()
        out["git_dirty"] = bool(subprocess.run(
            ["git", "status", "--porcelain", "--untracked-files=no"], cwd=REPO,
            capture_output=True, text=True, check=True).stdout.strip())
    except (OSError, subprocess.CalledProcessError):
        pass
    return out


def _machine() -> dict[str, Any]:
    info: dict[str, Any] = {
        "cores": os.cpu_count(),
        "platform": platform.platform(),
        "machine": platform.machine(),
    }
    try:
        info["cores_available"] = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        pass
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                info["cpu"] = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        import psutil

        info["memory_total_mb"] = psutil.virtual_memory().total / 2**20
    except ImportError:
        pass
    return info


# ------------------------------------------------------------------ output


def _fmt(v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "n/a"
    return f"{v:.3g}" if isinstance(v, float) else str(v)


def format_table(rep: Report) -> str:
    """The figures as an aligned text table."""
    lines = [f"{'figure':<50} {'value':>9} {'target':>9}  met",
             "-" * 76]
    for name, entry in rep.figures.items():
        met = entry.get("met")
        lines.append(f"{entry['label']:<50} {_fmt(entry['value']):>9} "
                     f"{entry.get('target', ''):>9}  "
                     f"{'yes' if met else 'NO' if met is False else '-'}")
        extra = []
        for key in ("pipeline_fps", "baseline_fps", "cpu_ratio", "wall_1_s", "wall_2_s", "cores_1",
                    "cores_2", "fit_s",
                    "bootstrap_s", "baseline_mb", "imports_mb", "frames"):
            if key in entry:
                extra.append(f"{key}={_fmt(entry[key])}")
        if extra:
            lines.append(f"    {', '.join(extra)}")
    for name, err in rep.errors.items():
        lines.append(f"NOT MEASURED {name}: {err}")
    return "\n".join(lines)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the benchmark; 0 when every figure was measured, 1 otherwise."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true",
                    help="small inputs (320x240, 100 frames): a smoke check of the harness")
    ap.add_argument("--config", choices=sorted(CONFIGS), default=None,
                    help="input size set (default: full; --quick = quick)")
    ap.add_argument("--cache", type=Path, default=HERE / ".cache",
                    help="where inputs are made and kept (default: benchmarks/.cache)")
    ap.add_argument("--out", type=Path, default=HERE / "results.json",
                    help="results JSON (default: benchmarks/results.json)")
    ap.add_argument("--only", default=",".join(GROUPS),
                    help=f"comma-separated subset of {', '.join(GROUPS)}")
    ap.add_argument("--repeats", type=int, default=None,
                    help="runs of each timed pair (default: per config)")
    ap.add_argument("--quiet", action="store_true", help="only the final table")
    ap.add_argument("--profile", action="store_true",
                    help="also profile measure (spots given, detection) on the short "
                    "recording with pyinstrument; text reports in the cache folder")
    args = ap.parse_args(argv)

    cfg = CONFIGS[args.config or ("quick" if args.quick else "full")]
    groups = [g.strip() for g in args.only.split(",") if g.strip()]
    unknown = [g for g in groups if g not in GROUPS]
    if unknown:
        ap.error(f"unknown group(s) {unknown}; choose from {', '.join(GROUPS)}")
    repeats = args.repeats or cfg.repeats

    def log(text: str) -> None:
        if not args.quiet:
            print(text, flush=True)

    t0 = time.perf_counter()
    inp = prepare(cfg, args.cache, log=log)
    t_inputs = time.perf_counter() - t0
    rep = Report()
    steps: dict[str, Callable[[], None]] = {
        "video": lambda: bench_video(inp, repeats, rep, log),
        "stills": lambda: bench_stills(inp, repeats, rep, log),
        "memory": lambda: bench_memory(inp, rep, log),
        "batch": lambda: bench_batch(inp, args.repeats or cfg.batch_repeats, rep, log,
                                     args.cache / "scratch"),
        "calibration": lambda: bench_calibration(inp, cfg.bootstrap_draws, rep, log),
    }
    timings: dict[str, float] = {"inputs_s": t_inputs}
    load: dict[str, list[float]] = {}
    for g in GROUPS:
        if g not in groups:
            continue
        log(f"{g}:")
        load[g] = list(os.getloadavg()) if hasattr(os, "getloadavg") else []
        t = time.perf_counter()
        try:
            steps[g]()
        except Exception as err:  # report, go on with the other figures
            rep.errors[g] = f"{type(err).__name__}: {err}"
            log(traceback.format_exc())
        timings[f"{g}_s"] = time.perf_counter() - t
    if args.profile:
        log("profile:")
        try:
            rep.runs["profiles"] = profile_measure(inp, args.cache, log)
        except Exception as err:  # pyinstrument missing, or measure failed
            rep.errors["profile"] = f"{type(err).__name__}: {err}"
    timings["total_s"] = time.perf_counter() - t0

    doc = {
        "schema": "ecl_quant.benchmark",
        "version": 1,
        "date": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "config": cfg.name,
        "repeats": repeats,
        "machine": _machine(),
        "versions": _versions(),
        "inputs": inp.description | {"folder": str(inp.folder)},
        "figures": rep.figures,
        "errors": rep.errors,
        "runs": rep.runs,
        "timings_s": timings,
        # 1, 5 and 15 min load averages when each group started: above the core count,
        # other processes were competing for the CPU and wall-time figures suffer.
        "load_average": load,
    }
    from ecl_quant._io import write_json_atomic

    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_json_atomic(args.out, _clean(doc))
    print(format_table(rep))
    busy = max((v[0] for v in load.values() if v), default=0.0)
    print(f"({cfg.name} inputs, {doc['machine'].get('cores')} cores, "
          f"{timings['total_s']:.0f} s; figures in {args.out})")
    if busy > (os.cpu_count() or 1):
        print(f"note: load average reached {busy:.1f} on {os.cpu_count()} cores during the "
              "run; other processes were competing, wall-time ratios are pessimistic")
    return 1 if rep.errors else 0


if __name__ == "__main__":
    raise SystemExit(main())
