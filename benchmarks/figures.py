"""The measuring functions of the benchmark: each times one thing and returns numbers.

Baselines are what the pipeline cannot avoid:

* bare decode: PyAV with the frame source's ``thread_type``, each frame's raw Y'CbCr
  planes wrapped as numpy arrays (what :mod:`ecl_quant.frames` hands on), nothing else;
* bare still reading: what :mod:`ecl_quant.frames` does for a JPEG (Pillow open +
  ``np.asarray``) for each file of the folder, nothing else.

Peak memory is measured in a fresh child process (``python figures.py child ...``),
which reports the high-water mark of its own resident memory at the end (``VmHWM`` of
``/proc/self/status``: the peak of the process image since ``exec``). The parent's
``ru_maxrss`` of the child (``os.wait4``) is kept for reference only: on Linux it starts
from the parent's resident size at the fork, so it cannot fall below the parent's.

Run as a script only through :mod:`benchmarks.run`.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent


@dataclass(frozen=True)
class Timing:
    """One timed run.

    Attributes
    ----------
    frames : int
        Frames (or files) processed.
    wall_s : float
        Wall-clock time, s.
    cpu_s : float
        CPU time of this process (all threads), s.
    busy_s : float or None
        CPU time of the whole machine over the run (every process, from /proc/stat on
        Linux; None elsewhere), s: counts a batch's worker processes too.
    """

    frames: int
    wall_s: float
    cpu_s: float
    busy_s: float | None = None

    @property
    def cores(self) -> float | None:
        """Cores kept busy on average (``busy_s`` / ``wall_s``), None when unknown."""
        return self.busy_s / self.wall_s if self.busy_s is not None and self.wall_s > 0 \
            else None

    @property
    def fps(self) -> float:
        """Frames per second of wall time."""
        return self.frames / self.wall_s if self.wall_s > 0 else math.nan

    def to_dict(self) -> dict[str, Any]:
        return asdict(self) | {"fps": self.fps, "cores": self.cores}


def machine_busy_s() -> float | None:
    """CPU seconds the machine has spent busy since boot (user, nice, system, irq,
    softirq of /proc/stat; idle and iowait left out), or None off Linux."""
    try:
        with open("/proc/stat") as fh:
            fields = fh.readline().split()
    except OSError:
        return None
    if not fields or fields[0] != "cpu":
        return None
    ticks = [int(v) for v in fields[1:8]]
    user, nice, system, _idle, _iowait, irq, softirq = ticks
    return (user + nice + system + irq + softirq) / float(os.sysconf("SC_CLK_TCK"))


class _Clock:
    def __enter__(self) -> _Clock:
        self.t0 = time.perf_counter()
        self.c0 = time.process_time()
        return self

    def __exit__(self, *exc: object) -> None:
        self.wall = time.perf_counter() - self.t0
        self.cpu = time.process_time() - self.c0


def video_thread_type() -> str:
    """The decoder threading the pipeline's frame source uses."""
    from ecl_quant import frames

    return str(getattr(frames, "VIDEO_THREAD_TYPE", "AUTO"))


def video_shape(path: str | Path) -> tuple[int, int]:
    """(rows, columns) of a video's frames."""
    import av

    with av.open(str(path)) as container:
        ctx = container.streams.video[0].codec_context
        return int(ctx.height), int(ctx.width)


# ------------------------------------------------------------------ baselines


def bare_decode(path: str | Path) -> Timing:
    """Decode every frame of a video and wrap its planes as arrays; keep nothing."""
    import av

    n = 0
    with _Clock() as clk:
        with av.open(str(path)) as container:
            stream = container.streams.video[0]
            stream.thread_type = video_thread_type()
            for frame in container.decode(stream):
                for plane in frame.planes:
                    np.frombuffer(plane, np.uint8).reshape(plane.height, plane.line_size)
                n += 1
    return Timing(n, clk.wall, clk.cpu)


def bare_read_stills(folder: str | Path) -> Timing:
    """Read every JPEG of a folder as the frame source does (Pillow, ``np.asarray``)."""
    from PIL import Image

    from ecl_quant.frames import natural_key

    files = sorted((p for p in Path(folder).iterdir() if p.suffix.lower() in (".jpg", ".jpeg")),
                   key=natural_key)
    with _Clock() as clk:
        for p in files:
            with Image.open(p) as im:
                np.asarray(im)
    return Timing(len(files), clk.wall, clk.cpu)


# ------------------------------------------------------------------ pipeline


def _measure_api() -> tuple[Any, Any]:
    try:
        from ecl_quant.measure import MeasureSettings, measure
    except ImportError:  # contract location
        from ecl_quant.curves import MeasureSettings, measure  # type: ignore[no-redef]
    return measure, MeasureSettings


def simulated_master_dark(shape: tuple[int, int], *, seed: int = 0) -> Any:
    """A master dark for ``shape`` frames: a dark offset of 0.4 % of full scale with a
    fixed pattern of 0.05 % in quarter-code steps (as a median of 8-bit dark frames has),
    the variances of 16 frames. Only its timing matters: with a dark, every pixel's value
    is its own, so measure takes its float path."""
    from ecl_quant.radiometry import MasterDark

    rng = np.random.default_rng(seed)
    pattern = np.round(rng.standard_normal(shape) * 4.0) / 4.0
    level = (0.004 + 0.0005 * pattern).astype(np.float32)
    var = np.full(shape, 1e-6, np.float32)
    return MasterDark(level, var, var / 16.0, 16, "median",
                      provenance={"source": "benchmarks: simulated"})


def run_measure(source: Any, *, spots: str | Path | None = None,
                dark: Any = None) -> tuple[Timing, Any]:
    """Time :func:`ecl_quant.measure.measure` (default settings) on one recording.

    Warnings are caught (and dropped): a benchmark input may well warn, e.g. a blank.
    """
    measure, settings_cls = _measure_api()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with _Clock() as clk:
            result = measure(source, spots=spots, dark=dark, settings=settings_cls(),
                             progress=False)
    n = int(result.curves_table["frame"].nunique()) if len(result.curves_table) else 0
    if n == 0:
        n = int(result.provenance.get("n_frames", 0) or 0)
    return Timing(n, clk.wall, clk.cpu), result


def warm_up(stills: str | Path, spots: str | Path) -> None:
    """Pay the pipeline's one-time costs (lazy imports, schema loading) before timing."""
    from ecl_quant.frames import natural_key

    files = sorted(Path(stills).glob("*.jpg"), key=natural_key)[:3]
    run_measure(files, spots=spots)
    run_measure(files, spots=None)


def run_batch(manifest: str | Path, *, workers: int, scratch: Path) -> Timing:
    """Wall time of :func:`ecl_quant.batch.run_batch` into a fresh output folder."""
    from ecl_quant.batch import BatchSettings, read_manifest
    from ecl_quant.batch import run_batch as batch

    scratch.mkdir(parents=True, exist_ok=True)
    out = Path(tempfile.mkdtemp(prefix=f"batch-w{workers}-", dir=scratch))
    man = read_manifest(manifest)
    try:
        busy0 = machine_busy_s()
        with _Clock() as clk:
            res = batch(man, BatchSettings(out_dir=out, workers=workers, force=True,
                                           progress=False))
        busy1 = machine_busy_s()
        failed = res.n_failed
    finally:
        shutil.rmtree(out, ignore_errors=True)
    if failed:
        raise RuntimeError(f"batch with {workers} worker(s): {failed} recording(s) failed")
    busy = busy1 - busy0 if busy0 is not None and busy1 is not None else None
    return Timing(len(man.recordings), clk.wall, clk.cpu, busy)


def run_calibration(table: str | Path, *, n_draws: int, model: str = "auto") -> dict[str, float]:
    """Fit standards and blanks, then bootstrap every unknown (``n_draws`` refits)."""
    import pandas as pd

    from ecl_quant.calibration import calibrate_table, quantify_table

    df = pd.read_csv(table)
    unknowns = df[df["role"] == "unknown"]
    with _Clock() as fit:
        cal = calibrate_table(df, model=model)
    with _Clock() as boot:
        res = quantify_table(unknowns, cal, method="bootstrap", n_draws=n_draws, seed=1)
    if not np.all(np.isfinite(res["se"].to_numpy(float))):
        raise RuntimeError("bootstrap gave a non-finite standard error")
    return {"fit_s": fit.wall, "bootstrap_s": boot.wall, "total_s": fit.wall + boot.wall,
            "model": str(cal.model), "n_unknown_samples": int(len(res)),
            "n_draws": int(n_draws)}


# ------------------------------------------------------------------ memory


def peak_memory(task: str, source: str | Path, *, spots: str | Path | None = None,
                timeout_s: float = 1800.0) -> dict[str, Any]:
    """Run ``task`` ("measure", "decode" or "import") in a fresh process; its peak RSS.

    Returns
    -------
    dict
        ``peak_rss_mb`` (the child's ``ru_maxrss`` from ``wait4``, MiB), ``frames``,
        ``wall_s``.
    """
    cmd = [sys.executable, str(Path(__file__).resolve()), "child", task, str(source)]
    if spots is not None:
        cmd += ["--spots", str(spots)]
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "child.json"
        err = Path(tmp) / "child.err"
        with open(out, "wb") as fo, open(err, "wb") as fe:
            proc = subprocess.Popen(cmd, stdout=fo, stderr=fe, cwd=str(REPO))
            t0 = time.perf_counter()
            _pid, status, usage = os.wait4(proc.pid, 0)
            proc.returncode = os.waitstatus_to_exitcode(status)
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            raise RuntimeError(f"memory child ({task}) failed: "
                               f"{err.read_text(errors='replace')[-2000:]}")
        doc = json.loads(out.read_text())
    if wall > timeout_s:
        raise RuntimeError(f"memory child ({task}) took {wall:.0f} s")
    # Linux reports ru_maxrss and VmHWM in KiB.
    return {"peak_rss_mb": doc["hwm_kib"] / 1024.0, "frames": doc["frames"], "wall_s": wall,
            "wait4_maxrss_mb": usage.ru_maxrss / 1024.0}


def _peak_rss_kib() -> int:
    """Peak resident set of this process image, KiB (VmHWM; ru_maxrss off Linux)."""
    import resource

    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        pass
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def _child(argv: list[str]) -> int:
    import argparse

    ap = argparse.ArgumentParser()
    ap.add_argument("task", choices=("measure", "decode", "import"))
    ap.add_argument("source")
    ap.add_argument("--spots")
    a = ap.parse_args(argv)
    if a.task == "measure":
        timing, _ = run_measure(a.source, spots=a.spots)
        frames = timing.frames
    elif a.task == "decode":
        frames = bare_decode(a.source).frames
    else:
        _measure_api()
        frames = 0
    sys.stdout.write(json.dumps({"frames": frames, "hwm_kib": _peak_rss_kib()}))
    return 0


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "child":
        sys.path.insert(0, str(REPO))
        raise SystemExit(_child(sys.argv[2:]))
    raise SystemExit("run the benchmark with: python benchmarks/run.py")
