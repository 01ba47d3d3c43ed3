"""Uncertainty validation: do the error bars the pipeline reports hold on simulated truth?

:func:`run_validation` simulates many small batches with :mod:`ecl_quant.simulate`
(cards of 4-9 spots, random spot brightness, sensor noise, ambient light, hand drift),
each holding blanks, a standard series, unknowns and extra blanks measured as unknowns,
all with known truth. Every batch goes through the real pipeline
(:func:`ecl_quant.batch.run_batch`: measure -> calibrate -> quantify) and the reported
figures are compared with the truth:

* **integrals**: ``z = (integral - truth) / integral_se`` over every measured spot; for
  honest standard errors z has mean 0 and SD 1;
* **concentrations**: the fraction of unknowns whose confidence interval (95 % by
  default) contains the true concentration;
* **detection**: the fraction of blanks, measured as unknowns, reported at or above the
  LOD (not flagged ``below_lod``), against the rate the LOD definition in use promises.

What "truth" means for an integral
----------------------------------
The comparison is with what the measurement estimates, derived from the simulator's
:class:`~ecl_quant.simulate.SpotTruth` and nothing else:

* the aperture collects ``SpotTruth.flux_fraction_within(aperture radius)`` of the
  spot's light (the spot files put the apertures on the true centres);
* frame ``i`` (time ``t_i``, exposure ``e_i``) holds the light of the window
  ``[t_i - e_i/2, t_i + e_i/2]``, so its expected net signal per second is
  ``F * integral_between(t_i - e_i/2, t_i + e_i/2) / e_i`` (times ``e_i`` again when
  the pipeline cannot divide by the exposure, i.e. video);
* the pipeline's integral is the linear combination ``sum_i a_i S_i`` with ``a_i`` the
  trapezoid weights on the recorded times minus the baseline share
  (:func:`ecl_quant.curves.integrate_curve`), over the baseline frames it reports.

``truth = sum_i a_i E[S_i]`` is therefore the expectation of the estimator, and z tests
the standard error alone. The difference between that expectation and the exact
integral ``F * integral_between(t_first, t_last)`` (the sampling error of a trapezoid on
window averages) is a bias of the method, reported separately as
``window_bias_over_se``.

Outputs (:func:`write_validation_outputs`): ``summary.json`` (settings, figures,
targets, pass/fail, run time), ``spots.csv`` (one row per spot), ``samples.csv`` (one
row per unknown and test blank) and ``validation.png``.
"""

from __future__ import annotations

import json
import math
import shutil
import sys
import tempfile
import time
import warnings
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ._io import atomic_write, ensure_dir, figure_png, to_jsonable, write_json_atomic
from .errors import InputFormatError, OutputError

__all__ = [
    "ValidationSettings",
    "ValidationResult",
    "TARGETS",
    "QUICK_BATCHES",
    "expected_integral",
    "simulate_batch",
    "run_validation_batch",
    "run_validation",
    "summarise",
    "assess",
    "acceptance_bands",
    "write_validation_outputs",
    "render_validation_plot",
    "format_report",
]

#: Targets of the full run (``make validate``).
TARGETS: dict[str, Any] = {
    "z_mean_abs_max": 0.1,
    "z_sd_range": (0.9, 1.1),
    "min_spots": 2000,
    "coverage_range": (0.93, 0.97),
    "min_unknowns": 400,
    "blank_above_lod_max": 0.05,
}
#: Batches of ``--quick``.
QUICK_BATCHES = 12

SPOTS_CSV_COLUMNS = (
    "batch", "card", "recording", "spot", "role", "sample", "concentration", "amplitude_fs",
    "aperture_radius_px", "flux_fraction", "integral", "integral_se", "truth",
    "truth_window", "z", "z_window", "baseline_frames", "flags", "gain_e_per_fs",
    "read_noise_fs", "background_fs", "ambient_fs", "drift_px")
SAMPLES_CSV_COLUMNS = (
    "batch", "sample", "kind", "true_concentration", "n", "concentration", "se", "ci_low",
    "ci_high", "level", "covered", "above_lod", "lod", "lod_method", "flags")


# ------------------------------------------------------------------ settings


@dataclass(frozen=True)
class ValidationSettings:
    """The simulated design and the pipeline options of a validation run.

    Ranges ``(low, high)`` are drawn uniformly per batch (per card for the drift and the
    onset), so that many sensors, light levels and hands are covered.

    Attributes
    ----------
    n_batches : int
        Simulated batches.
    seed : int
        Master seed; batch ``k`` uses ``numpy.random.SeedSequence([seed, k])``.
    workers : int
        Processes (1: run in this process).
    encoding : {"png", "tiff16", "jpeg", "h264"}
        How the cards are written. PNG (8-bit sRGB, lossless) is the target; JPEG and
        H.264 add compression bias (report it, do not tune on it).
    size_px : (int, int)
        Frame (height, width).
    n_frames : int
    fps : float
    exposure_s : float
        Exposure time of every frame. The default, the whole frame interval (1/fps),
        makes the frames tile time, so the trapezoid integral of their per-second values
        has no sampling error. With shorter exposures (gaps between frames) a pulse a
        few frames wide is sampled at a phase that varies from spot to spot, an error of
        the integral (about 0.8 % at 1/30 s in 0.1 s for these pulses) that no
        measurement SE covers; it shows as ``window_bias_over_se`` in the summary.
    radius_px : float
        Half-maximum radius of the simulated spots.
    spacing_px : float
        Spot pitch on the card.
    aperture_scale : float
        Aperture radius in the spot files, in multiples of ``radius_px``.
    grids : tuple of (int, int)
        Card layouts (rows, cols) drawn from for each card (4-9 spots).
    standards : tuple of float
        Standard concentrations (units: ``units``).
    standard_replicates : int
        Spots per standard level.
    n_blanks : int
        Blank spots used by the calibration (role blank).
    n_unknowns : int
        Unknown samples per batch, true concentration log-uniform over the standards.
    unknown_replicates : (int, int)
        Range of spots per unknown (inclusive).
    n_test_blanks : int
        Blank samples measured as unknowns (the LOD claim check).
    test_blank_replicates : (int, int)
        Range of spots per test blank (inclusive).
    response_fs_per_conc : (float, float)
        Peak spot amplitude (FS per frame at the base exposure) per concentration unit.
    blank_amplitude_fs : (float, float)
        Amplitude of the blank's own emission (the calibration intercept).
    spot_cv : float
        Relative spot-to-spot (electrode) variability of the amplitude; 0: replicate
        spots differ by measurement noise only.
    gain_e_per_fs, read_noise_fs, background_fs, ambient_fs, drift_px : (float, float)
        Sensor and scene ranges.
    onset_s, rise_s, decay_s : (float, float)
        Pulse timing ranges (onset per card, shape per batch). With the defaults the
        recording holds all but < 0.05 % of every pulse, so the integral of a given
        concentration does not depend on its card's onset (a pulse cut off by the end
        of the recording would add card-to-card scatter that no measurement SE covers).
    onset_jitter_s : float
        SD of the per-spot onset around the card's.
    n_hot_pixels : int
    model : str
        Calibration model (``batch --model``).
    weights : str or None
        Calibration weights (``batch --weights``).
    level : float
        Confidence level of the intervals.
    units : str
    noise : {"estimate", "true"}
        ``estimate``: the pipeline estimates gain and read noise from each recording
        (its default). ``true``: it is given the simulator's gain and read noise
        (``read_var``/``gain`` of MeasureSettings), as a camera characterised with
        ``camera`` would supply them (these omit the 8-bit quantisation noise).
    measure_options : dict
        Further :class:`~ecl_quant.measure.MeasureSettings` fields.
    keep_files : bool
        Keep each batch's simulated recordings and outputs (under ``work/``).
    """

    n_batches: int = 70
    seed: int = 0
    workers: int = 2
    encoding: str = "png"
    size_px: tuple[int, int] = (96, 96)
    n_frames: int = 44
    fps: float = 10.0
    exposure_s: float = 0.1
    radius_px: float = 5.0
    spacing_px: float = 24.0
    aperture_scale: float = 1.5
    grids: tuple[tuple[int, int], ...] = ((2, 2), (2, 3), (3, 2), (3, 3))
    standards: tuple[float, ...] = (1.0, 2.0, 5.0, 10.0, 20.0)
    standard_replicates: int = 3
    n_blanks: int = 4
    n_unknowns: int = 6
    unknown_replicates: tuple[int, int] = (1, 3)
    n_test_blanks: int = 3
    test_blank_replicates: tuple[int, int] = (1, 3)
    response_fs_per_conc: tuple[float, float] = (0.008, 0.016)
    blank_amplitude_fs: tuple[float, float] = (0.0, 0.004)
    spot_cv: float = 0.0
    gain_e_per_fs: tuple[float, float] = (2500.0, 8000.0)
    read_noise_fs: tuple[float, float] = (0.0005, 0.002)
    background_fs: tuple[float, float] = (0.02, 0.05)
    ambient_fs: tuple[float, float] = (0.0, 0.03)
    drift_px: tuple[float, float] = (0.0, 2.0)
    onset_s: tuple[float, float] = (0.6, 0.9)
    rise_s: tuple[float, float] = (0.08, 0.15)
    decay_s: tuple[float, float] = (0.3, 0.42)
    onset_jitter_s: float = 0.03
    n_hot_pixels: int = 3
    model: str = "linear"
    weights: str | None = None
    level: float = 0.95
    units: str = "umol/L"
    noise: str = "estimate"
    measure_options: dict[str, Any] = field(default_factory=dict)
    keep_files: bool = False

    def __post_init__(self) -> None:
        from .simulate import ENCODINGS

        if self.n_batches < 1:
            raise InputFormatError(f"--batches {self.n_batches}: give 1 or more")
        if self.workers < 1:
            raise InputFormatError(f"--workers {self.workers}: give 1 or more")
        if self.encoding not in ENCODINGS:
            raise InputFormatError(f"encoding {self.encoding!r}: use one of "
                                   f"{', '.join(ENCODINGS)}")
        if len(set(self.standards)) < 2 or min(self.standards) <= 0:
            raise InputFormatError("give at least two different positive standard levels")
        if not 0.5 <= self.level < 1:
            raise InputFormatError(f"level {self.level:g}: give a level in [0.5, 1)")
        if self.n_blanks < 0 or self.n_unknowns < 0 or self.n_test_blanks < 0:
            raise InputFormatError("sample counts must be >= 0")
        for name in ("unknown_replicates", "test_blank_replicates"):
            lo, hi = getattr(self, name)
            if not 1 <= lo <= hi:
                raise InputFormatError(f"{name} must be (low, high) with 1 <= low <= high")
        if not self.grids or any(r < 1 or c < 1 for r, c in self.grids):
            raise InputFormatError("grids must be a list of (rows, cols) of at least 1")
        if self.noise not in ("estimate", "true"):
            raise InputFormatError(f"noise {self.noise!r}: use estimate or true")
        if self.spot_cv < 0:
            raise InputFormatError("spot_cv must be >= 0")
        object.__setattr__(self, "measure_options", dict(self.measure_options))

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly form."""
        return json.loads(json.dumps(asdict(self)))


# ------------------------------------------------------------------ truth


def expected_integral(spot: Any, time_s: Sequence[float], exposure_s: Sequence[float], *,
                      aperture_radius_px: float, baseline_frames: int,
                      per_second: bool = True) -> tuple[float, float]:
    """What the pipeline's integral of one spot estimates, from the simulator's truth.

    Parameters
    ----------
    spot : SpotTruth
        The simulated spot.
    time_s, exposure_s : (n,) sequence of float
        Frame times as recorded and exposure times, s.
    aperture_radius_px : float
        Radius of the circular aperture centred on the spot.
    baseline_frames : int
        Number of leading frames the pipeline used as the pre-emission baseline.
    per_second : bool
        The pipeline divided each frame by its exposure time (stills with EXIF); False
        for video, whose frames stay in FS per frame.

    Returns
    -------
    expected : float
        ``sum_i a_i E[S_i]``: trapezoid weights minus the baseline share (see
        :func:`ecl_quant.curves.integrate_curve`) applied to the exact expected net
        signal of every frame, ``F * integral_between(t_i - e_i/2, t_i + e_i/2) / e_i``
        (not divided by ``e_i`` when ``per_second`` is False). Unit: FS (FS/s x s), or
        FS x s without exposure normalisation.
    window : float
        ``F * integral_between(t_first, t_last)`` (times the base exposure when
        ``per_second`` is False): the exact integral over the recorded span.
    """
    from .curves import trapezoid_weights

    t = np.asarray(time_s, dtype=np.float64)
    e = np.asarray(exposure_s, dtype=np.float64)
    frac = float(spot.flux_fraction_within(float(aperture_radius_px)))
    mean_rate = np.array([spot.integral_between(ti - ei / 2.0, ti + ei / 2.0) / ei
                          for ti, ei in zip(t, e)])
    frame_value = mean_rate if per_second else mean_rate * e
    c = trapezoid_weights(t)
    n_b = int(baseline_frames)
    a = c.copy()
    if n_b > 0:
        a[:n_b] -= c.sum() / n_b
    expected = frac * float(np.dot(a, frame_value))
    window = frac * spot.integral_between(float(t[0]), float(t[-1]))
    if not per_second:
        window *= float(np.median(e))
    return expected, float(window)


# ------------------------------------------------------------------ one batch


def _uniform(rng: np.random.Generator, lo_hi: tuple[float, float]) -> float:
    lo, hi = lo_hi
    return float(lo if hi <= lo else rng.uniform(lo, hi))


def _design(settings: ValidationSettings, rng: np.random.Generator) -> list[dict[str, Any]]:
    """Spot roles of one batch (before placing them on cards), shuffled."""
    items: list[dict[str, Any]] = []
    for _ in range(settings.n_blanks):
        items.append({"sample": "blank", "role": "blank", "kind": "blank", "conc": 0.0})
    for lv in settings.standards:
        for _ in range(settings.standard_replicates):
            items.append({"sample": f"std_{lv:g}", "role": "standard", "kind": "standard",
                          "conc": float(lv)})
    lo, hi = min(settings.standards), max(settings.standards)
    for k in range(settings.n_unknowns):
        conc = float(math.exp(rng.uniform(math.log(lo), math.log(hi))))
        m = int(rng.integers(settings.unknown_replicates[0], settings.unknown_replicates[1] + 1))
        for _ in range(m):
            items.append({"sample": f"unknown_{k + 1:02d}", "role": "unknown",
                          "kind": "unknown", "conc": conc})
    for k in range(settings.n_test_blanks):
        m = int(rng.integers(settings.test_blank_replicates[0],
                             settings.test_blank_replicates[1] + 1))
        for _ in range(m):
            items.append({"sample": f"test_blank_{k + 1:02d}", "role": "unknown",
                          "kind": "test_blank", "conc": 0.0})
    order = rng.permutation(len(items))
    return [items[i] for i in order]


def simulate_batch(folder: str | Path, settings: ValidationSettings, batch: int
                   ) -> dict[str, Any]:
    """Write one simulated batch: cards, spot files and a manifest, with the truth.

    Parameters
    ----------
    folder : str or Path
        Empty or missing folder; receives ``card_NN/`` (stills) or ``card_NN.mp4``,
        ``card_NN.spots.json`` and ``manifest.csv``.
    settings : ValidationSettings
    batch : int
        Batch index (with ``settings.seed`` it fixes every random draw).

    Returns
    -------
    dict
        ``manifest`` (Path), ``cards`` (list of dicts: path, truth (RecordingTruth),
        assignment per spot number), ``samples`` (truth per sample name).
    """
    from .simulate import SimulationSpec, simulate_recording
    from .spots import SpotSet, make_spot, save_spots

    root = ensure_dir(Path(folder))
    rng = np.random.default_rng(np.random.SeedSequence([int(settings.seed), int(batch)]))
    items = _design(settings, rng)
    k_resp = _uniform(rng, settings.response_fs_per_conc)
    a_blank = _uniform(rng, settings.blank_amplitude_fs)
    gain = _uniform(rng, settings.gain_e_per_fs)
    read = _uniform(rng, settings.read_noise_fs)
    bg = _uniform(rng, settings.background_fs)
    amb = _uniform(rng, settings.ambient_fs)
    rise = _uniform(rng, settings.rise_s)
    decay = max(_uniform(rng, settings.decay_s), 1.5 * rise)
    cards: list[dict[str, Any]] = []
    manifest_rows: list[dict[str, Any]] = []
    pos = 0
    card_no = 0
    while pos < len(items):
        card_no += 1
        n_rows, n_cols = settings.grids[int(rng.integers(len(settings.grids)))]
        n_spots = n_rows * n_cols
        assigned = items[pos:pos + n_spots]
        pos += n_spots
        # Free positions get filler spots: measured (integral z-scores) but not assigned.
        lo, hi = min(settings.standards), max(settings.standards)
        while len(assigned) < n_spots:
            assigned.append({"sample": None, "role": "filler", "kind": "filler",
                             "conc": float(math.exp(rng.uniform(math.log(lo), math.log(hi))))})
        conc = np.array([it["conc"] for it in assigned])
        amp = (a_blank + k_resp * conc)
        if settings.spot_cv > 0:
            amp = amp * np.maximum(1.0 + settings.spot_cv * rng.standard_normal(n_spots), 0.05)
        onset_card = _uniform(rng, settings.onset_s)
        onsets = onset_card + settings.onset_jitter_s * rng.standard_normal(n_spots)
        spec = SimulationSpec(
            size=tuple(settings.size_px), n_rows=n_rows, n_cols=n_cols,  # type: ignore[arg-type]
            radius_px=settings.radius_px, spacing_px=settings.spacing_px,
            amplitudes=tuple(float(a) for a in amp),
            onset_s=tuple(float(o) for o in onsets), rise_s=rise, decay_s=decay,
            n_frames=settings.n_frames, fps=settings.fps, exposure_s=settings.exposure_s,
            gain_e_per_fs=gain,
            read_noise_fs=read, background_rgb=(bg, bg, 0.9 * bg), ambient_fs=amb,
            n_hot_pixels=settings.n_hot_pixels, drift_px=_uniform(rng, settings.drift_px),
            encoding=settings.encoding,  # type: ignore[arg-type]
            seed=int(rng.integers(2**31 - 1)))
        name = f"card_{card_no:02d}"
        rec_path = root / (f"{name}.mp4" if settings.encoding == "h264" else name)
        truth = simulate_recording(rec_path, spec, overwrite=True)
        r_ap = settings.aperture_scale * settings.radius_px
        spots = SpotSet(tuple(make_spot(s.number, "circle", (s.x_px, s.y_px, r_ap))
                              for s in truth.spots), settings.size_px,
                        provenance={"made_by": "ecl_quant.validate (true centres)"})
        spot_file = root / f"{name}.spots.json"
        save_spots(spots, spot_file)
        by_sample: dict[str, list[int]] = {}
        for s, it in zip(truth.spots, assigned):
            if it["sample"] is not None:
                by_sample.setdefault(it["sample"], []).append(s.number)
        for sample, numbers in by_sample.items():
            it = next(a for a in assigned if a["sample"] == sample)
            manifest_rows.append({
                "path": rec_path.name, "sample": sample, "role": it["role"],
                "concentration": "" if it["role"] == "unknown" else f"{it['conc']:.12g}",
                "spot": ";".join(str(n) for n in numbers), "spots": spot_file.name})
        cards.append({"name": name, "path": rec_path, "truth": truth,
                      "assignment": {s.number: it for s, it in zip(truth.spots, assigned)},
                      "aperture_radius_px": r_ap})
    manifest = root / "manifest.csv"
    cols = ["path", "sample", "role", "concentration", "spot", "spots"]
    with atomic_write(manifest, "w") as fh:
        pd.DataFrame(manifest_rows, columns=cols).to_csv(fh, index=False, lineterminator="\n")
    samples = {}
    for it in items:
        if it["sample"] is not None:
            samples[it["sample"]] = {"kind": it["kind"], "role": it["role"], "conc": it["conc"]}
    return {"manifest": manifest, "cards": cards, "samples": samples,
            "sensor": {"gain_e_per_fs": gain, "read_noise_fs": read, "background_fs": bg,
                       "ambient_fs": amb, "response_fs_per_conc": k_resp,
                       "blank_amplitude_fs": a_blank, "rise_s": rise, "decay_s": decay}}


def _flag_words(text: Any) -> list[str]:
    if not isinstance(text, str):
        return []
    return [w for w in text.split(";") if w]


def run_validation_batch(settings: ValidationSettings, batch: int, work_dir: str | Path
                         ) -> dict[str, Any]:
    """Simulate one batch, run the real pipeline on it and compare with the truth.

    Parameters
    ----------
    settings : ValidationSettings
    batch : int
    work_dir : str or Path
        Parent folder; the batch uses ``work_dir/batch_NNNN`` (removed afterwards unless
        ``settings.keep_files``).

    Returns
    -------
    dict
        ``spots`` and ``samples`` (lists of row dicts, columns :data:`SPOTS_CSV_COLUMNS`
        and :data:`SAMPLES_CSV_COLUMNS`), ``noise`` (estimated against true noise per
        card), ``errors`` (pipeline problems), ``elapsed_s``.
    """
    from .batch import BatchSettings, run_batch
    from .calibration import load_calibration

    t0 = time.perf_counter()
    folder = Path(work_dir) / f"batch_{batch:04d}"
    if folder.exists():
        shutil.rmtree(folder)
    try:
        sim = simulate_batch(folder / "input", settings, batch)
        t_sim = time.perf_counter() - t0
        opts = dict(settings.measure_options)
        if settings.noise == "true":
            opts.update(read_var=sim["sensor"]["read_noise_fs"] ** 2,
                        gain=sim["sensor"]["gain_e_per_fs"])
        bs = BatchSettings(out_dir=folder / "out", workers=1, model=settings.model,
                           weights=settings.weights, level=settings.level,
                           units=settings.units, force=True, progress=False,
                           measure_options=opts)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = run_batch(sim["manifest"], bs)
        errors = [] if res.errors is None else [
            f"{r['recording']}: {r['stage']}: {r['message']}"
            for r in res.errors.to_dict(orient="records")]
        rec_of = {o.path_text: o.rec_id for o in res.outcomes}
        spot_rows: list[dict[str, Any]] = []
        noise_rows: list[dict[str, Any]] = []
        for card in sim["cards"]:
            rec_id = rec_of.get(card["path"].name)
            rec_dir = folder / "out" / "recordings" / str(rec_id)
            if rec_id is None or not (rec_dir / "spots.csv").is_file():
                continue
            tab = pd.read_csv(rec_dir / "spots.csv")
            run = json.loads((rec_dir / "run.json").read_text(encoding="utf-8"))
            analysis = run.get("analysis", {})
            per_second = bool(analysis.get("per_exposure", True))
            nm = analysis.get("noise_model", {})
            truth = card["truth"]
            noise_rows.append({
                "card": card["name"], "source": nm.get("source"),
                "read_var": nm.get("read_var"), "gain_e_per_fs": nm.get("gain_e_per_fs"),
                "true_read_var": truth.read_noise_fs**2, "true_gain_e_per_fs": truth.gain_e_per_fs,
                "background_fs": float(np.mean(truth.spots[0].background_fs[:1]))
                + truth.dark_level_fs})
            t = truth.frame_times_s
            e = truth.frame_exposure_s
            by_number = {s.number: s for s in truth.spots}
            for r in tab.to_dict(orient="records"):
                s = by_number[int(r["spot"])]
                it = card["assignment"][s.number]
                n_b = int(r["baseline_frames"]) if np.isfinite(r["baseline_frames"]) else 0
                r_ap = float(r["radius_px"])
                exp_i, win = expected_integral(s, t, e, aperture_radius_px=r_ap,
                                               baseline_frames=n_b, per_second=per_second)
                integral, se = float(r["integral"]), float(r["integral_se"])
                ok = math.isfinite(integral) and math.isfinite(se) and se > 0
                spot_rows.append({
                    "batch": batch, "card": card["name"], "recording": rec_id,
                    "spot": s.number, "role": it["kind"], "sample": it["sample"] or "",
                    "concentration": it["conc"], "amplitude_fs": s.amplitude_fs,
                    "aperture_radius_px": r_ap, "flux_fraction": s.flux_fraction_within(r_ap),
                    "integral": integral, "integral_se": se, "truth": exp_i,
                    "truth_window": win,
                    "z": (integral - exp_i) / se if ok else math.nan,
                    "z_window": (integral - win) / se if ok else math.nan,
                    "baseline_frames": n_b, "flags": r.get("flags") if isinstance(
                        r.get("flags"), str) else "",
                    "gain_e_per_fs": truth.gain_e_per_fs, "read_noise_fs": truth.read_noise_fs,
                    "background_fs": sim["sensor"]["background_fs"],
                    "ambient_fs": sim["sensor"]["ambient_fs"],
                    "drift_px": float(truth.spec.get("drift_px", 0.0))})
        sample_rows: list[dict[str, Any]] = []
        cal_path = folder / "out" / "calibration.json"
        cal = load_calibration(cal_path) if cal_path.is_file() else None
        lod = float(cal.lod) if cal is not None else math.nan
        lod_method = str(cal.limits.get("method", "")) if cal is not None else ""
        results = res.results if res.results is not None else pd.DataFrame()
        by_name = {str(r["sample"]): r for r in results.to_dict(orient="records")}
        for name, st in sim["samples"].items():
            if st["role"] != "unknown":
                continue
            r = by_name.get(name)
            if r is None:
                continue
            conc = float(r["concentration"]) if r["concentration"] == r["concentration"] \
                else math.nan
            lo, hi = float(r["ci_low"]), float(r["ci_high"])
            flags = _flag_words(r.get("flags"))
            covered = (lo <= st["conc"] <= hi) if math.isfinite(lo) and math.isfinite(hi) \
                else False
            sample_rows.append({
                "batch": batch, "sample": name, "kind": st["kind"],
                "true_concentration": st["conc"], "n": int(r["n"]), "concentration": conc,
                "se": float(r["se"]), "ci_low": lo, "ci_high": hi,
                "level": float(r["level"]), "covered": bool(covered),
                "above_lod": "below_lod" not in flags and math.isfinite(conc),
                "lod": lod, "lod_method": lod_method, "flags": ";".join(flags)})
        if cal is not None:
            blanks = [r for r in res.measurements.to_dict(orient="records")
                      if r["role"] == "blank" and r["used"]]
            n_blank_used = len(blanks)
        else:
            n_blank_used = 0
        return {"batch": batch, "spots": spot_rows, "samples": sample_rows,
                "noise": noise_rows, "errors": errors, "n_blank_readings": n_blank_used,
                "sensor": sim["sensor"], "elapsed_s": time.perf_counter() - t0,
                "simulate_s": t_sim}
    finally:
        if not settings.keep_files:
            shutil.rmtree(folder, ignore_errors=True)


def _batch_job(args: tuple[ValidationSettings, int, str]) -> dict[str, Any]:
    settings, batch, work = args
    return run_validation_batch(settings, batch, work)


# ------------------------------------------------------------------ statistics


def _wilson(k: int, n: int, z: float = 1.959963984540054) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion (Wilson 1927, JASA 22, 209)."""
    if n == 0:
        return math.nan, math.nan
    p = k / n
    den = 1.0 + z * z / n
    mid = (p + z * z / (2 * n)) / den
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    return max(0.0, min(p, mid - half)), min(1.0, max(p, mid + half))


def _promised_blank_rate(lod_method: str, n_blank: int, m: int, k_lod: float = 3.0) -> float:
    """Probability that a blank sample mean of ``m`` readings reaches the IUPAC LOD.

    LOD response = blank mean + k s_blank from ``n_blank`` readings, so
    ``P(ybar_m - ybar_b >= k s_b) = P(T_{n-1} >= k / sqrt(1/m + 1/n))`` (a Student t
    with n - 1 degrees of freedom: ybar_m - ybar_b ~ N(0, sigma^2 (1/m + 1/n)) and
    s_b^2 ~ sigma^2 chi^2_{n-1} / (n - 1), independent). NaN for other LOD methods.
    """
    from scipy import stats

    if not lod_method.startswith("blank") or n_blank < 2:
        return math.nan
    return float(stats.t.sf(k_lod / math.sqrt(1.0 / m + 1.0 / n_blank), n_blank - 1))


def summarise(batches: Sequence[dict[str, Any]], settings: ValidationSettings
              ) -> dict[str, Any]:
    """Figures of a validation run from the per-batch records.

    Returns
    -------
    dict
        ``integrals`` (z mean, SD, count, robust SD, by role, the window bias),
        ``concentrations`` (coverage with a Wilson interval, by concentration tercile,
        mean interval width), ``blanks`` (fraction at or above the LOD, Wilson interval,
        the rate the LOD definition promises), ``noise_model`` (estimated against true
        gain and read noise), ``pipeline_errors``.
    """
    spots = pd.DataFrame([r for b in batches for r in b["spots"]],
                         columns=list(SPOTS_CSV_COLUMNS))
    samples = pd.DataFrame([r for b in batches for r in b["samples"]],
                           columns=list(SAMPLES_CSV_COLUMNS))
    z = spots["z"].to_numpy(dtype=float)
    z = z[np.isfinite(z)]
    zw = spots["z_window"].to_numpy(dtype=float)
    zw = zw[np.isfinite(zw)]
    n_z = int(z.size)

    def zstats(v: np.ndarray) -> dict[str, Any]:
        if v.size < 2:
            return {"n": int(v.size), "mean": math.nan, "sd": math.nan}
        q75, q25 = np.percentile(v, [75, 25])
        return {"n": int(v.size), "mean": float(v.mean()), "sd": float(v.std(ddof=1)),
                "se_of_mean": float(v.std(ddof=1) / math.sqrt(v.size)),
                "robust_sd": float((q75 - q25) / 1.3489795003921634),
                "fraction_abs_gt_2": float(np.mean(np.abs(v) > 2.0)),
                "fraction_abs_gt_3": float(np.mean(np.abs(v) > 3.0))}

    by_role = {}
    for role, g in spots.groupby("role"):
        v = g["z"].to_numpy(dtype=float)
        by_role[str(role)] = zstats(v[np.isfinite(v)])
    # Brightness terciles: an SE that is right on average can still be wrong at the ends.
    by_bright = {}
    fin = spots[np.isfinite(spots["z"].astype(float))]
    if len(fin) >= 30:
        edges = np.quantile(fin["truth"], [0, 1 / 3, 2 / 3, 1])
        labels = ["dim", "middle", "bright"]
        idx = np.clip(np.searchsorted(edges, fin["truth"], side="right") - 1, 0, 2)
        for j, lab in enumerate(labels):
            v = fin["z"].to_numpy(dtype=float)[idx == j]
            by_bright[lab] = zstats(v) | {"truth_range": [float(edges[j]), float(edges[j + 1])]}
    integrals = zstats(z) | {
        "by_role": by_role, "by_brightness": by_bright,
        "n_spots_total": int(len(spots)),
        "n_invalid": int(len(spots) - n_z),
        "window_bias_over_se": zstats(zw),
        "mean_integral_se": float(spots["integral_se"].mean()) if len(spots) else math.nan,
    }
    unk = samples[samples["kind"] == "unknown"]
    ok = unk[np.isfinite(unk["ci_low"].astype(float)) & np.isfinite(unk["ci_high"].astype(float))]
    k_cov = int(ok["covered"].sum())
    n_cov = int(len(unk))
    cov_by = {}
    if len(unk) >= 9:
        tert = np.quantile(unk["true_concentration"], [0, 1 / 3, 2 / 3, 1])
        idx = np.clip(np.searchsorted(tert, unk["true_concentration"], side="right") - 1, 0, 2)
        for j, lab in enumerate(["low", "middle", "high"]):
            g = unk[idx == j]
            cov_by[lab] = {"n": int(len(g)), "coverage": float(g["covered"].mean()) if len(g)
                           else math.nan,
                           "concentration_range": [float(tert[j]), float(tert[j + 1])]}
    by_m = {}
    for m, g in unk.groupby("n"):
        by_m[str(int(m))] = {"n": int(len(g)), "coverage": float(g["covered"].mean())}
    rel_err = (ok["concentration"] - ok["true_concentration"]) / ok["se"]
    concentrations = {
        "n": n_cov, "n_with_interval": int(len(ok)), "covered": k_cov,
        "coverage": k_cov / n_cov if n_cov else math.nan,
        "coverage_wilson_95": list(_wilson(k_cov, n_cov)),
        "level": settings.level, "by_concentration": cov_by, "by_replicates": by_m,
        "z_conc": zstats(rel_err.to_numpy(dtype=float)) if len(ok) else {},
        "median_relative_halfwidth": float(np.median(
            (ok["ci_high"] - ok["ci_low"]) / (2 * ok["true_concentration"]))) if len(ok)
        else math.nan,
        "flags": _count_flags(unk["flags"]),
    }
    tb = samples[samples["kind"] == "test_blank"]
    k_b = int(tb["above_lod"].sum())
    n_b = int(len(tb))
    n_blank = [b.get("n_blank_readings", 0) for b in batches]
    methods = sorted(set(tb["lod_method"])) if len(tb) else []
    promised = []
    bmap = {b["batch"]: b.get("n_blank_readings", 0) for b in batches}
    for r in tb.to_dict(orient="records"):
        promised.append(_promised_blank_rate(str(r["lod_method"]), int(bmap.get(r["batch"], 0)),
                                             int(r["n"])))
    prom = float(np.nanmean(promised)) if promised and np.isfinite(promised).any() else math.nan
    blanks = {
        "n": n_b, "above_lod": k_b, "fraction_above_lod": k_b / n_b if n_b else math.nan,
        "wilson_95": list(_wilson(k_b, n_b)), "lod_methods": methods,
        "promised_rate": prom,
        "promised_rate_rule": "IUPAC LOD = blank mean + 3 s_blank from n blank readings: "
                              "P(T_{n-1} >= 3 / sqrt(1/m + 1/n)) for a test blank of m "
                              "readings, averaged over the test blanks",
        "blank_readings_per_batch": [int(min(n_blank)), int(max(n_blank))] if n_blank else [],
    }
    noise = [r for b in batches for r in b["noise"]]
    nm: dict[str, Any] = {"n_recordings": len(noise)}
    if noise:
        g = np.array([r["gain_e_per_fs"] if r["gain_e_per_fs"] is not None else math.nan
                      for r in noise], float)
        gt = np.array([r["true_gain_e_per_fs"] for r in noise], float)
        rv = np.array([r["read_var"] for r in noise], float)
        lv = np.array([r["background_fs"] for r in noise], float)
        rt = np.array([r["true_read_var"] for r in noise], float)
        with np.errstate(divide="ignore", invalid="ignore"):
            pred = rv + lv / g
            true = rt + lv / gt
        nm.update({
            "sources": sorted({str(r["source"]) for r in noise}),
            "gain_ratio_median": float(np.nanmedian(g / gt)),
            "gain_ratio_iqr": [float(x) for x in np.nanpercentile(g / gt, [25, 75])],
            "background_pixel_variance_ratio_median": float(np.nanmedian(pred / true)),
            "note": "per-pixel variance at the card background level (read + shot; the "
                    "estimate's intercept also absorbs the dark pedestal, which carries no "
                    "shot noise), estimated over true",
        })
    errors = [e for b in batches for e in b["errors"]]
    return {"integrals": integrals, "concentrations": concentrations, "blanks": blanks,
            "noise_model": nm, "pipeline_errors": {"n": len(errors), "first": errors[:20]}}


def _count_flags(col: Iterable[Any]) -> dict[str, int]:
    out: dict[str, int] = {}
    for f in col:
        for w in _flag_words(f):
            out[w] = out.get(w, 0) + 1
    return dict(sorted(out.items()))


def acceptance_bands(summary: dict[str, Any], *, widen: bool) -> dict[str, Any]:
    """Acceptance bands for the figures of a run.

    The full run uses :data:`TARGETS`. ``widen=True`` (``--quick``, the unit test) adds
    three standard errors of the statistic itself to each band, so a run with few
    spots or unknowns is judged by what its size can resolve:

    * mean of N z-scores: SE = 1 / sqrt(N);
    * SD of N normal z-scores: SE = 1 / sqrt(2 (N - 1));
    * a coverage or a rate p from n trials: binomial SD = sqrt(p (1 - p) / n) at the
      nominal p.
    """
    n_z = int(summary["integrals"]["n"])
    n_u = int(summary["concentrations"]["n"])
    n_b = int(summary["blanks"]["n"])
    level = float(summary["concentrations"]["level"])
    lo_sd, hi_sd = TARGETS["z_sd_range"]
    lo_c, hi_c = TARGETS["coverage_range"]
    lim_b = TARGETS["blank_above_lod_max"]
    if widen:
        m_extra = 3.0 / math.sqrt(max(n_z, 1))
        sd_extra = 3.0 / math.sqrt(2.0 * max(n_z - 1, 1))
        c_extra = 3.0 * math.sqrt(level * (1 - level) / max(n_u, 1))
        b_extra = 3.0 * math.sqrt(lim_b * (1 - lim_b) / max(n_b, 1))
    else:
        m_extra = sd_extra = c_extra = b_extra = 0.0
    # The coverage band is centred on the nominal level (93-97 % for 95 %).
    half_c = (hi_c - lo_c) / 2.0
    return {
        "z_mean": [-TARGETS["z_mean_abs_max"] - m_extra, TARGETS["z_mean_abs_max"] + m_extra],
        "z_sd": [lo_sd - sd_extra, hi_sd + sd_extra],
        "coverage": [level - half_c - c_extra, min(1.0, level + half_c + c_extra)],
        "blank_above_lod_max": lim_b + b_extra,
        "min_spots": 0 if widen else TARGETS["min_spots"],
        "min_unknowns": 0 if widen else TARGETS["min_unknowns"],
        "widened": widen,
    }


def assess(summary: dict[str, Any], *, widen: bool) -> dict[str, Any]:
    """Pass/fail of every target (see :func:`acceptance_bands`)."""
    b = acceptance_bands(summary, widen=widen)
    i, c, bl = summary["integrals"], summary["concentrations"], summary["blanks"]

    def inside(v: float, band: Sequence[float]) -> bool:
        return math.isfinite(v) and band[0] <= v <= band[1]

    checks = {
        "z_mean": inside(i["mean"], b["z_mean"]),
        "z_sd": inside(i["sd"], b["z_sd"]),
        "n_spots": i["n"] >= b["min_spots"],
        "coverage": inside(c["coverage"], b["coverage"]),
        "n_unknowns": c["n"] >= b["min_unknowns"],
        "blanks_above_lod": math.isfinite(bl["fraction_above_lod"])
        and bl["fraction_above_lod"] <= b["blank_above_lod_max"],
    }
    return {"bands": b, "checks": checks, "passed": all(checks.values())}


# ------------------------------------------------------------------ the run


@dataclass(frozen=True, eq=False)
class ValidationResult:
    """Outcome of :func:`run_validation`.

    Attributes
    ----------
    spots : DataFrame
        One row per simulated spot (:data:`SPOTS_CSV_COLUMNS`).
    samples : DataFrame
        One row per unknown and test blank (:data:`SAMPLES_CSV_COLUMNS`).
    summary : dict
        :func:`summarise` figures plus ``assessment``, ``timing`` and ``settings``.
    provenance : dict
        Settings, versions, dates, run time.
    """

    spots: pd.DataFrame
    samples: pd.DataFrame
    summary: dict[str, Any]
    provenance: dict[str, Any]

    def to_frame(self) -> pd.DataFrame:
        """The spots table."""
        return self.spots

    @property
    def passed(self) -> bool:
        """Every target met."""
        return bool(self.summary["assessment"]["passed"])


def run_validation(settings: ValidationSettings = ValidationSettings(), *,
                   work_dir: str | Path | None = None, widen: bool = False,
                   progress: bool = False,
                   status: Callable[[str], None] | None = None) -> ValidationResult:
    """Simulate ``settings.n_batches`` batches, run the pipeline on each, summarise.

    Parameters
    ----------
    settings : ValidationSettings
    work_dir : str or Path, optional
        Where the batches are simulated (default: a temporary folder, removed after).
    widen : bool
        Judge with bands widened by the statistics' own standard errors (quick runs).
    progress : bool
        Progress bar on stderr.
    status : callable, optional
        Receives a line per finished batch.

    Returns
    -------
    ValidationResult
    """
    from tqdm import tqdm

    from .batch import software_versions

    t0 = time.perf_counter()
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    own_tmp = work_dir is None
    work = Path(tempfile.mkdtemp(prefix="ecl-quant-validate-")) if own_tmp else \
        ensure_dir(Path(work_dir))  # type: ignore[arg-type]
    jobs = [(settings, k, str(work)) for k in range(settings.n_batches)]
    batches: list[dict[str, Any]] = []
    try:
        bar = tqdm(total=len(jobs), desc="validate", unit="batch", file=sys.stderr,
                   disable=(not progress) or None, leave=False)
        with bar:
            if settings.workers == 1 or len(jobs) == 1:
                for job in jobs:
                    batches.append(_batch_job(job))
                    bar.update(1)
                    if status:
                        status(_status_line(batches[-1]))
            else:
                import multiprocessing as mp
                from concurrent.futures import ProcessPoolExecutor, as_completed

                # forkserver/spawn: clean children, safe when the parent runs threads.
                methods = mp.get_all_start_methods()
                ctx = mp.get_context("forkserver" if "forkserver" in methods else "spawn")
                if ctx.get_start_method() == "forkserver":
                    ctx.set_forkserver_preload(["ecl_quant.validate"])
                with ProcessPoolExecutor(max_workers=min(settings.workers, len(jobs)),
                                         mp_context=ctx) as pool:
                    futs = [pool.submit(_batch_job, j) for j in jobs]
                    for fut in as_completed(futs):
                        batches.append(fut.result())
                        bar.update(1)
                        if status:
                            status(_status_line(batches[-1]))
    finally:
        if own_tmp and not settings.keep_files:
            shutil.rmtree(work, ignore_errors=True)
    batches.sort(key=lambda b: b["batch"])
    summary = summarise(batches, settings)
    wall = time.perf_counter() - t0
    summary["assessment"] = assess(summary, widen=widen)
    summary["timing"] = {
        "wall_s": round(wall, 2), "workers": settings.workers,
        "batch_s_mean": round(float(np.mean([b["elapsed_s"] for b in batches])), 3),
        "simulate_s_mean": round(float(np.mean([b["simulate_s"] for b in batches])), 3),
        "cpu_s_total": round(float(np.sum([b["elapsed_s"] for b in batches])), 2),
    }
    spots = pd.DataFrame([r for b in batches for r in b["spots"]],
                         columns=list(SPOTS_CSV_COLUMNS))
    samples = pd.DataFrame([r for b in batches for r in b["samples"]],
                           columns=list(SAMPLES_CSV_COLUMNS))
    prov = {"tool": "ecl-quant validate", "started_utc": started,
            "finished_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "settings": settings.to_dict(), "widened_bands": widen,
            "versions": software_versions(), "wall_s": round(wall, 2),
            "cautions": "Simulated data only; a check of the error bars, not of a method."}
    summary["settings"] = settings.to_dict()
    return ValidationResult(spots, samples, summary, prov)


def _status_line(b: dict[str, Any]) -> str:
    return (f"batch {b['batch']}: {len(b['spots'])} spots, {len(b['samples'])} samples, "
            f"{b['elapsed_s']:.1f} s" + (f", {len(b['errors'])} problem(s)" if b["errors"]
                                          else ""))


# ------------------------------------------------------------------ outputs


def render_validation_plot(result: ValidationResult, *, dpi: int = 100) -> bytes:
    """PNG: z-score histogram against N(0, 1), z against brightness, interval coverage
    by concentration, and blanks at or above the LOD."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from scipy import stats

    fig = Figure(figsize=(11.0, 8.0), dpi=dpi)
    FigureCanvasAgg(fig)
    s = result.summary
    z = result.spots["z"].to_numpy(dtype=float)
    z = z[np.isfinite(z)]
    ax = fig.add_subplot(2, 2, 1)
    if z.size:
        lim = max(4.0, float(np.nanpercentile(np.abs(z), 99.5)))
        bins = np.linspace(-lim, lim, 49)
        ax.hist(z, bins=bins, density=True, color="#5b8cc0", alpha=0.8, label="measured")
        xx = np.linspace(-lim, lim, 400)
        ax.plot(xx, stats.norm.pdf(xx), "k-", linewidth=1.2, label="N(0, 1)")
    i = s["integrals"]
    ax.set_title(f"integral z-scores: mean {i['mean']:.3f}, SD {i['sd']:.3f} (n={i['n']})",
                 fontsize=9)
    ax.set_xlabel("(integral - truth) / integral_se")
    ax.legend(fontsize=8)
    ax = fig.add_subplot(2, 2, 2)
    sp = result.spots[np.isfinite(result.spots["z"].astype(float))]
    if len(sp):
        for role, g in sp.groupby("role"):
            ax.scatter(np.maximum(g["truth"], 1e-3), g["z"], s=4, alpha=0.5, label=str(role))
        ax.set_xscale("symlog", linthresh=1.0)
        for v in (-2, 0, 2):
            ax.axhline(v, color="0.5", linewidth=0.7, linestyle="--" if v else "-")
        ax.legend(fontsize=7, markerscale=3)
    ax.set_xlabel("true integral (FS)")
    ax.set_ylabel("z")
    ax.set_title("z against brightness", fontsize=9)
    ax = fig.add_subplot(2, 2, 3)
    c = s["concentrations"]
    labels, vals, errs = [], [], []
    for lab, d in c.get("by_concentration", {}).items():
        if d["n"]:
            labels.append(f"{lab}\n{d['concentration_range'][0]:.3g}-"
                          f"{d['concentration_range'][1]:.3g}\n(n={d['n']})")
            p = d["coverage"]
            vals.append(p)
            errs.append(math.sqrt(max(c["level"] * (1 - c["level"]), 1e-12) / d["n"]))
    if not vals and c["n"]:
        labels, vals = [f"all\n(n={c['n']})"], [c["coverage"]]
        errs = [math.sqrt(c["level"] * (1 - c["level"]) / c["n"])]
    if vals:
        ax.bar(range(len(vals)), vals, yerr=errs, color="#7fb27f", capsize=3)
        ax.set_xticks(range(len(vals)), labels, fontsize=7)
    ax.axhline(c["level"], color="k", linewidth=1.0)
    lo_c, hi_c = TARGETS["coverage_range"]
    ax.axhspan(lo_c, hi_c, color="0.85", zorder=0)
    ax.set_ylim(max(0.0, min(vals + [c["level"]]) - 0.15) if vals else 0.0, 1.0)
    cov = c["coverage"]
    ax.set_title(f"{c['level']:.0%} interval coverage of unknowns: {cov:.3f} (n={c['n']})",
                 fontsize=9)
    ax.set_ylabel("fraction covering the truth")
    ax = fig.add_subplot(2, 2, 4)
    bl = s["blanks"]
    ax.bar([0, 1], [bl["fraction_above_lod"], bl["promised_rate"]],
           color=["#c07f5b", "#bbbbbb"])
    lo_w, hi_w = bl["wilson_95"]
    if math.isfinite(lo_w):
        ax.errorbar([0], [bl["fraction_above_lod"]],
                    yerr=[[max(0.0, bl["fraction_above_lod"] - lo_w)],
                          [max(0.0, hi_w - bl["fraction_above_lod"])]],
                    color="k", capsize=4)
    ax.axhline(TARGETS["blank_above_lod_max"], color="k", linestyle="--", linewidth=1.0)
    ax.set_xticks([0, 1], ["blanks at/above LOD\n(measured)", "promised by the\nLOD rule"],
                  fontsize=8)
    ax.set_title(f"blank samples reported at or above the LOD: {bl['above_lod']} of {bl['n']}",
                 fontsize=9)
    verdict = "all targets met" if s["assessment"]["passed"] else "TARGET MISSED: " + ", ".join(
        k for k, v in s["assessment"]["checks"].items() if not v)
    fig.suptitle(f"ecl-quant uncertainty validation ({result.provenance['settings']['encoding']},"
                 f" {result.provenance['settings']['n_batches']} batches): {verdict}",
                 fontsize=10)
    fig.tight_layout(rect=(0, 0, 1, 0.96))
    return figure_png(fig, dpi=dpi)



def write_validation_outputs(result: ValidationResult, out_dir: str | Path) -> list[Path]:
    """Write summary.json, spots.csv, samples.csv and validation.png (atomically).

    Raises
    ------
    OutputError
        ``out_dir`` exists and is not a folder, or cannot be written.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise OutputError("exists and is not a folder; choose another --out", path=out)
    ensure_dir(out)
    written = []
    doc = {"summary": to_jsonable(result.summary), "provenance": to_jsonable(result.provenance)}
    write_json_atomic(out / "summary.json", doc)
    written.append(out / "summary.json")
    for name, df in (("spots.csv", result.spots), ("samples.csv", result.samples)):
        with atomic_write(out / name, "w") as fh:
            df.to_csv(fh, index=False, lineterminator="\n", float_format="%.9g")
        written.append(out / name)
    png = render_validation_plot(result)
    with atomic_write(out / "validation.png", "wb", encoding=None) as fh:
        fh.write(png)
    written.append(out / "validation.png")
    return written


def format_report(result: ValidationResult) -> str:
    """A few lines for the terminal: the figures, the bands and the verdict."""
    s = result.summary
    i, c, bl, a = s["integrals"], s["concentrations"], s["blanks"], s["assessment"]
    b = a["bands"]
    ok = {True: "ok", False: "MISSED"}
    st = result.provenance["settings"]
    lines = [
        f"{st['n_batches']} batches ({st['encoding']}, {st['model']} calibration, weights "
        f"{st['weights'] or 'none'}, spot CV {st['spot_cv']:g}, noise model "
        f"{st.get('noise', 'estimate')}, seed {st['seed']}); "
        f"bands {'widened by 3 SE' if a['bands']['widened'] else 'as targeted'}",
        f"integral z-scores: mean {i['mean']:+.3f} (band {b['z_mean'][0]:+.3f}.."
        f"{b['z_mean'][1]:+.3f}) [{ok[a['checks']['z_mean']]}], SD {i['sd']:.3f} "
        f"(band {b['z_sd'][0]:.3f}.."
        f"{b['z_sd'][1]:.3f}) [{ok[a['checks']['z_sd']]}], n = {i['n']} spots"
        + ("" if a["checks"]["n_spots"] else f" [fewer than {b['min_spots']}]"),
        f"  window bias (trapezoid on frames vs exact integral) / SE: mean "
        f"{i['window_bias_over_se']['mean']:+.3f}",
        f"{c['level']:.0%} intervals of unknowns: coverage {c['coverage']:.3f} "
        f"({c['covered']} of {c['n']}; Wilson 95 % {c['coverage_wilson_95'][0]:.3f}.."
        f"{c['coverage_wilson_95'][1]:.3f}; band {b['coverage'][0]:.3f}..{b['coverage'][1]:.3f})"
        f" [{ok[a['checks']['coverage']]}]"
        + ("" if a["checks"]["n_unknowns"] else f" [fewer than {b['min_unknowns']}]"),
        f"blanks at or above the LOD: {bl['above_lod']} of {bl['n']} = "
        f"{bl['fraction_above_lod']:.3f} (limit {b['blank_above_lod_max']:.3f}; the LOD rule "
        f"({', '.join(bl['lod_methods'])}) promises {bl['promised_rate']:.3f}) "
        f"[{ok[a['checks']['blanks_above_lod']]}]",
        f"run time {s['timing']['wall_s']:.0f} s on {s['timing']['workers']} worker(s)",
    ]
    if s["pipeline_errors"]["n"]:
        lines.append(f"pipeline problems: {s['pipeline_errors']['n']} "
                     f"(first: {s['pipeline_errors']['first'][0]})")
    return "\n".join(lines)
