"""Command-line interface: thin subcommands over the public API.

``main(argv=None) -> int`` so tests call it directly. Exit codes: 0 ok, 1 partial
(a batch with failed recordings), 2 bad input or usage, 3 internal error (a bug).
Errors print one line on stderr; ``--debug`` shows the traceback too.

Each subcommand has an ``_add_<name>(sub)`` that declares its options and a
``_run_<name>(args) -> int`` that calls the API. Keep them short: logic belongs in the
stage modules.
"""

from __future__ import annotations

import argparse
import sys
import traceback
import warnings
from collections.abc import Callable, Sequence

from . import __version__
from .errors import EclQuantError, EclQuantWarning

__all__ = ["main", "build_parser"]

# (name, add-parser function) in the order shown by --help; filled below.
_COMMANDS: list[tuple[str, Callable[[argparse._SubParsersAction], None]]] = []


def _command(func: Callable[[argparse._SubParsersAction], None]) -> Callable[..., None]:
    _COMMANDS.append((func.__name__.removeprefix("_add_"), func))
    return func


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.add_argument("--debug", action="store_true", help="show tracebacks on errors")


# ---------------------------------------------------------------- subcommands
# Each block: @_command def _add_<name>(sub) ... p.set_defaults(run=_run_<name>)
# --- BEGIN COMMANDS ---
@_command
def _add_camera(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "camera",
        help="EMVA 1288 photon transfer of flat/dark frames, or a device response profile "
        "from an exposure bracket",
        description="ecl-quant camera FOLDER [--dark FOLDER] [--out DIR]: photon transfer "
        "(system gain, dark noise, saturation, linearity error, SNR) of flat-field pairs "
        "listed in FOLDER/levels.csv (file,role,exposure_s[,level,photons]) or grouped by "
        "EXIF exposure time. ecl-quant camera --bracket FOLDER --profile OUT.json "
        "[--exposures LIST]: Debevec response curve of an 8-bit exposure bracket, saved as "
        "a profile for --transfer profile=FILE.",
    )
    p.add_argument("folder", nargs="?", help="folder of flat-field frames (with levels.csv "
                   "or EXIF exposure times)")
    p.add_argument("--dark", metavar="FOLDER", help="folder of dark frames (same exposure "
                   "times as the flats)")
    p.add_argument("--out", metavar="DIR", default="camera-output",
                   help="output folder for camera.json and plots (default camera-output)")
    p.add_argument("--channel", choices=["auto", "mono", "red", "green", "blue"],
                   default="auto", help="colour plane analysed (default: grey frames as "
                   "they are, green for colour and raw)")
    p.add_argument("--roi", metavar="X,Y,W,H", help="analyse only this region (pixels)")
    p.add_argument("--max-code", type=float, metavar="N", help="sensor maximum code, e.g. "
                   "4095 for 12-bit data stored in 16-bit files (default: the file's maximum)")
    p.add_argument("--eta", type=float, metavar="QE", help="quantum efficiency 0..1, if known, "
                   "for the sensitivity threshold in photons")
    p.add_argument("--highpass", action="store_true",
                   help="EMVA 1288 section 8.1 high-pass filter before DSNU/PRNU")
    p.add_argument("--bracket", metavar="FOLDER", help="exposure bracket of a static scene "
                   "(8-bit stills)")
    p.add_argument("--profile", metavar="OUT.json", help="where to write the device profile")
    p.add_argument("--exposures", metavar="LIST", help="exposure times in seconds in "
                   "file-name order, e.g. 1/250,1/125,1/60 (default: EXIF ExposureTime)")
    p.add_argument("--method", choices=["debevec", "robertson"], default="debevec",
                   help="response recovery method (default debevec)")
    p.add_argument("--force", action="store_true",
                   help="replace existing outputs (camera.json and plots, or the profile)")
    _common(p)
    p.set_defaults(run=_run_camera)


def _run_camera(args: argparse.Namespace) -> int:
    from pathlib import Path

    from . import camera
    from ._io import check_overwrite
    from .errors import InputFormatError

    say = (lambda *a: None) if args.quiet else print
    if args.bracket:
        if args.folder:
            raise InputFormatError("give either FOLDER (photon transfer) or --bracket, not both")
        if not args.profile:
            raise InputFormatError("--bracket needs --profile OUT.json (where to save it)")
        check_overwrite([args.profile], force=args.force)
        images, times, files, (make, model) = camera.read_bracket(args.bracket,
                                                                  exposures=args.exposures)
        try:
            prof = camera.profile_from_bracket(images, times, method=args.method, make=make,
                                               model=model, sources=[f.name for f in files])
        except EclQuantError as err:
            raise type(err)(err.reason, path=err.path or args.bracket) from err
        camera.save_profile(prof, args.profile)
        mid = prof.response["green"][128]
        say(f"device profile ({prof.method}, {len(files)} images, "
            f"{make or 'unknown make'} {model or ''}): {args.profile}")
        say(f"code 128 -> {mid:.4f} of full scale (sRGB would give 0.2159); "
            f"use --transfer profile={args.profile}")
        return 0
    if not args.folder:
        raise InputFormatError("give the folder of flat-field frames, or --bracket FOLDER")
    roi = None
    if args.roi:
        try:
            x, y, w, h = (int(v) for v in args.roi.split(","))
        except ValueError:
            raise InputFormatError(f"--roi {args.roi!r} must be X,Y,W,H in pixels") from None
        roi = (x, y, w, h)
    if args.eta is not None and not 0 < args.eta <= 1:
        raise InputFormatError(f"--eta {args.eta:g} must be a quantum efficiency in (0, 1]")
    check_overwrite([Path(args.out) / name for name in
                     ("camera.json", "ptc.png", "linearity.png", "snr.png")], force=args.force)
    settings = camera.PhotonTransferSettings(eta=args.eta, highpass=args.highpass)
    result = camera.measure_photon_transfer(args.folder, dark=args.dark, channel=args.channel,
                                            roi=roi, max_code=args.max_code, settings=settings)
    written = camera.write_camera_outputs(result, args.out)
    for line in result.verdict():
        say(line)
    for note in result.notes:
        say(f"note: {note}")
    say(f"wrote {', '.join(str(p) for p in written)}")
    return 0


@_command
def _add_batch(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "batch", help="measure a folder of recordings, calibrate, quantify, report",
        description="Measure every recording of a manifest (CSV: path, sample, role, "
        "concentration, spot, dark, spots, channel, transfer), calibrate on the standards "
        "and blanks, quantify the unknowns; write measurements.csv, calibration.json, "
        "results.csv, errors.csv, per-recording folders and report.html. A rerun on the "
        "same --out redoes only what is missing.")
    p.add_argument("manifest", help="manifest CSV (paths in it are relative to it)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (default: batch-<manifest name> here)")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="local worker processes (default: one per CPU; 1 = no pool)")
    p.add_argument("--dask", metavar="ADDRESS", default=None,
                   help="run on a dask.distributed scheduler (e.g. tcp://host:8786); "
                   "workers must see the same paths")
    p.add_argument("--model", default="linear",
                   choices=["linear", "wls", "quadratic", "power", "4pl", "5pl", "auto"],
                   help="calibration model (default: linear)")
    p.add_argument("--weights", default=None, choices=["1/x2", "1/y2", "1/var"],
                   help="calibration weights (default: none)")
    p.add_argument("--response", default="integral", choices=["integral", "peak"],
                   help="figure of merit calibrated (default: integral)")
    p.add_argument("--units", default="umol/L", help="concentration units (default: umol/L)")
    p.add_argument("--level", type=float, default=0.95,
                   help="confidence level of intervals (default: 0.95)")
    p.add_argument("--channel", default="red", choices=["red", "green", "blue", "luma", "raw"],
                   help="colour channel for rows without their own (default: red)")
    p.add_argument("--transfer", default="auto",
                   help="transfer function for rows without their own: auto, srgb, bt709, "
                   "linear, gamma=G, profile=FILE (default: auto)")
    p.add_argument("--force", action="store_true",
                   help="measure everything again (ignore the cache); allow a non-empty --out")
    p.add_argument("--allow-outside", action="store_true",
                   help="accept manifest paths outside the manifest's folder")
    _common(p)
    p.set_defaults(run=_run_batch)


def _run_batch(args: argparse.Namespace) -> int:
    from pathlib import Path

    from .batch import CAUTIONS, BatchSettings, format_summary, run_batch
    from .report import write_report

    out = Path(args.out) if args.out else Path(f"batch-{Path(args.manifest).stem}")
    settings = BatchSettings(
        out_dir=out, workers=args.workers, dask=args.dask, model=args.model,
        response=args.response, units=args.units, level=args.level, force=args.force,
        channel=args.channel, transfer=args.transfer, allow_outside=args.allow_outside,
        weights=args.weights, progress=not args.quiet)
    result = run_batch(args.manifest, settings, finalize=write_report)
    if not args.quiet:
        print(format_summary(result, units=args.units, level=args.level))
        print(f"report: {result.out_dir / 'report.html'}")
        for text in CAUTIONS:
            print(f"caution: {text}")
    if result.fatal:
        print(f"error: {result.out_dir}: no calibration: {result.fatal}", file=sys.stderr)
    elif result.exit_code == 1:
        print(f"partial: {result.n_failed} of {len(result.outcomes)} recording(s) failed "
              f"({len(result.errors)} problem(s)); see {result.out_dir / 'errors.csv'}",
              file=sys.stderr)
    return result.exit_code


@_command
def _add_simulate(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "simulate", help="write the invented demo scenario (Tern Lake Hatchery)",
        description="Write simulated card recordings (JPEG bursts and H.264 videos), a "
        "manifest and the ground truth of the invented Tern Lake Hatchery scenario.")
    p.add_argument("--out", metavar="DIR", required=True, help="destination folder")
    p.add_argument("--seed", type=int, default=5, help="random seed (default: 5, the shipped demo)")
    p.add_argument("--force", action="store_true",
                   help="write over existing files in --out (an earlier scenario is "
                   "remade without it)")
    _common(p)
    p.set_defaults(run=_run_simulate)


def _run_simulate(args: argparse.Namespace) -> int:
    from pathlib import Path

    from ._io import check_overwrite
    from .scenario import is_scenario_folder, simulate_scenario

    out = Path(args.out)
    # Remaking the demo scenario over an earlier one is what this command is for; other
    # files named manifest.csv or truth.json are not replaced without --force.
    ours = is_scenario_folder(out)
    check_overwrite([out / "manifest.csv", out / "truth.json"], force=args.force or ours)
    truth = simulate_scenario(out, seed=args.seed, overwrite=args.force or ours)
    if not args.quiet:
        print(f"wrote {len(truth['recordings'])} recordings, manifest.csv and truth.json "
              f"to {args.out}")
    return 0


@_command
def _add_calibrate(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "calibrate", help="fit a calibration to a table of standards and blanks",
        description="ecl-quant calibrate TABLE: fit response against concentration from a "
        "CSV or Parquet table with one row per reading (replicates as repeated rows; blanks "
        "at concentration 0 or marked in a role column: standard, blank, unknown). Writes "
        "calibration.json (model, parameters, covariance, s_y/x, limits, linearity tests, "
        "units, the data used, a sha256) and calibration.png beside it.")
    p.add_argument("table", help="CSV or Parquet table of readings")
    p.add_argument("--x", default="concentration", metavar="COL",
                   help="concentration column (default: concentration)")
    p.add_argument("--y", default="response", metavar="COL",
                   help="response column (default: response)")
    p.add_argument("--role", default="role", metavar="COL",
                   help="role column, if present (default: role)")
    p.add_argument("--se", default="response_se", metavar="COL",
                   help="measurement SE column, if present; used by --weights 1/var "
                   "(default: response_se)")
    p.add_argument("--model", default="auto", metavar="NAME",
                   help="auto, linear, wls, quadratic, power, 4pl or 5pl (default: auto: the "
                   "line if Mandel's and the lack-of-fit test accept it, else lowest AICc)")
    p.add_argument("--weights", default=None, metavar="RULE",
                   help="none, 1/x2, 1/y2 or 1/var (default: none)")
    p.add_argument("--level", type=float, default=0.95,
                   help="confidence level of intervals and bands (default: 0.95)")
    p.add_argument("--units", default="", help="concentration units, e.g. umol/L")
    p.add_argument("--response-units", default="", metavar="UNITS",
                   help="response units, e.g. 'full scale x s'")
    p.add_argument("--lod-method", default="auto", metavar="METHOD",
                   help="primary LOD/LOQ: auto (blanks if 3 or more, else ICH), blank "
                   "(IUPAC mean + 3 s / 10 s), intercept (Miller & Miller), ich (3.3 and "
                   "10 sigma/S) (default: auto)")
    p.add_argument("--readings", type=int, default=1, metavar="M",
                   help="readings averaged per unknown, for ISO 11843 limits (default: 1)")
    p.add_argument("--out", default="calibration.json", metavar="FILE",
                   help="calibration file to write; the plot goes beside it as .png "
                   "(default: calibration.json)")
    p.add_argument("--no-plot", action="store_true", help="do not write calibration.png")
    p.add_argument("--force", action="store_true",
                   help="replace an existing --out file (and its .png)")
    _common(p)
    p.set_defaults(run=_run_calibrate)


def _run_calibrate(args: argparse.Namespace) -> int:
    from pathlib import Path

    from ._io import atomic_write, check_overwrite, ensure_dir
    from .calibration import (CalibrationOptions, calibrate_table, plot_calibration,
                              read_table, save_calibration)

    planned = [Path(args.out)] + ([] if args.no_plot else [Path(args.out).with_suffix(".png")])
    check_overwrite(planned, force=args.force)
    df = read_table(args.table)
    try:
        opts = CalibrationOptions(lod_method=args.lod_method, readings_per_unknown=args.readings)
        cal = calibrate_table(df, x=args.x, y=args.y, role=args.role, se=args.se,
                              model=args.model, weights=args.weights, level=args.level,
                              units=args.units, response_units=args.response_units,
                              options=opts, path=args.table)
        png = None if args.no_plot else plot_calibration(cal)
    except EclQuantError as err:
        if err.path is None:
            raise type(err)(err.reason, path=args.table) from err
        raise
    out = Path(args.out)
    ensure_dir(out.parent if str(out.parent) else Path("."))
    digest = save_calibration(cal, out)
    written = [str(out)]
    if png is not None:
        with atomic_write(out.with_suffix(".png"), "wb", encoding=None) as fh:
            fh.write(png)
        written.append(str(out.with_suffix(".png")))
    if not args.quiet:
        print(cal.summary())
        print(f"wrote {', '.join(written)} (sha256 {digest[:12]}...)")
    return 0


@_command
def _add_quantify(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "quantify", help="concentrations of unknowns from a calibration.json",
        description="ecl-quant quantify TABLE --calibration calibration.json: read back "
        "each sample (replicate rows grouped by the sample column) through the calibration: "
        "concentration, standard error, confidence interval and flags (below_lod, "
        "below_loq, above_range, extrapolated, no_solution). Writes results.csv and its "
        "provenance as results.json.")
    p.add_argument("table", help="CSV or Parquet table of readings")
    p.add_argument("--calibration", required=True, metavar="FILE",
                   help="calibration.json written by ecl-quant calibrate")
    p.add_argument("--y", default="response", metavar="COL",
                   help="response column (default: response)")
    p.add_argument("--sample", default="sample", metavar="COL",
                   help="sample column grouping replicates (default: sample; without it "
                   "every row is a sample)")
    p.add_argument("--se", default="response_se", metavar="COL",
                   help="per-reading measurement SE column, if present (default: response_se)")
    p.add_argument("--method", default="analytic", metavar="METHOD",
                   help="analytic (s_x0 / delta method) or bootstrap (default: analytic)")
    p.add_argument("--level", type=float, default=None,
                   help="confidence level (default: the calibration's)")
    p.add_argument("--draws", type=int, default=2000, metavar="N",
                   help="bootstrap draws (default: 2000)")
    p.add_argument("--seed", type=int, default=0, help="bootstrap seed (default: 0)")
    p.add_argument("--out", default="results.csv", metavar="FILE",
                   help="results table (default: results.csv)")
    p.add_argument("--force", action="store_true",
                   help="replace an existing --out file (and its .json)")
    _common(p)
    p.set_defaults(run=_run_quantify)


def _run_quantify(args: argparse.Namespace) -> int:
    from pathlib import Path

    from ._io import atomic_write, check_overwrite, ensure_dir, write_json_atomic
    from .calibration import load_calibration, quantify_table, read_table

    check_overwrite([Path(args.out), Path(args.out).with_suffix(".json")], force=args.force)
    cal = load_calibration(args.calibration)
    df = read_table(args.table)
    try:
        res = quantify_table(df, cal, y=args.y, sample=args.sample, se=args.se,
                             method=args.method, level=args.level, n_draws=args.draws,
                             seed=args.seed, path=args.table)
    except EclQuantError as err:
        if err.path is None:
            raise type(err)(err.reason, path=args.table) from err
        raise
    out = Path(args.out)
    ensure_dir(out.parent if str(out.parent) else Path("."))
    text = res.to_csv(index=False)
    with atomic_write(out, "w") as fh:
        fh.write(text)
    write_json_atomic(out.with_suffix(".json"), res.attrs["provenance"])
    if not args.quiet:
        u = cal.units or "conc. units"
        pct = f"{100 * res['level'].iloc[0]:g} %" if len(res) else ""
        print(f"{len(res)} sample(s), {cal.model} calibration, {pct} intervals, units {u}")
        for _, r in res.iterrows():
            print(f"  {r['sample']}: {r['concentration']:.4g} +- {r['se']:.2g} {u} "
                  f"[{r['ci_low']:.4g}, {r['ci_high']:.4g}] n={r['n']}"
                  + (f"  ({r['flags']})" if r["flags"] else ""))
        print(f"wrote {out}, {out.with_suffix('.json')}")
    return 0


@_command
def _add_measure(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "measure", help="measure the spots of one recording (curves, peak, integral)",
        description="ecl-quant measure INPUT: find (or read) the spots of one recording "
        "(a video, a folder of stills, an image or a DNG), integrate each spot's linear light "
        "frame by frame with a local background, and report peak, time to peak, onset, "
        "duration and integrated emission with standard errors. Writes spots.csv, "
        "curves.csv, spots.json (reusable with --spots), run.json, overlay.png and "
        "curves.png into --out.")
    p.add_argument("input", help="video file, folder of stills, image or DNG")
    p.add_argument("--dark", metavar="PATH", default=None,
                   help="dark frames (folder, image or video) at the same size and exposure")
    p.add_argument("--spots", metavar="FILE", default=None,
                   help="spot file (JSON: circles, rects, polygons); default: detect")
    p.add_argument("--channel", default="red", choices=["red", "green", "blue", "luma", "raw"],
                   help="colour channel (default: red, for Ru(bpy)3 2+ emission)")
    p.add_argument("--transfer", default="auto",
                   help="auto, srgb, bt709, linear, gamma=G or profile=FILE (default: auto)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (default: ./measure-<input name>)")
    p.add_argument("--fps", type=float, default=None,
                   help="frame rate for stills without capture times")
    p.add_argument("--detect", default="threshold", choices=["threshold", "log"],
                   help="spot detection: threshold + connected components, or Laplacian of "
                   "Gaussian (default: threshold)")
    p.add_argument("--detect-frames", default="auto", choices=["auto", "all", "key"],
                   help="frames that spot detection reads: a video's key frames (fast), "
                   "every frame, or auto: key frames when they are at most 2 s apart "
                   "(default: auto)")
    p.add_argument("--no-drift", action="store_true",
                   help="do not register frames (tripod recordings)")
    p.add_argument("--noise-from", metavar="CAMERA_JSON", default=None,
                   help="take read noise and gain from a camera.json written by "
                   "'ecl-quant camera' on the same linear readout (default: estimate them "
                   "from the recording)")
    p.add_argument("--force", action="store_true",
                   help="write into an existing non-empty --out folder (replacing its files)")
    p.add_argument("--json", action="store_true",
                   help="print the spot table as JSON on stdout (for scripts)")
    _common(p)
    p.set_defaults(run=_run_measure)


def _run_measure(args: argparse.Namespace) -> int:
    import json
    import math
    from pathlib import Path

    from .errors import SpotError
    from .measure import (
        MeasureSettings,
        check_output_dir,
        measure,
        summary_table,
        write_measure_outputs,
    )

    src = Path(args.input)
    out = Path(args.out) if args.out else Path(f"measure-{src.stem if src.suffix else src.name}")
    check_output_dir(out, force=args.force)
    noise: dict[str, object] = {}
    if args.noise_from:
        from .radiometry import camera_noise_model

        read_var, gain, source = camera_noise_model(args.noise_from)
        noise = {"read_var": read_var, "gain": gain, "noise_source": source}
    settings = MeasureSettings(channel=args.channel, transfer=args.transfer, fps=args.fps,
                               detect=args.detect, detect_frames=args.detect_frames,
                               drift=not args.no_drift, **noise)
    result = measure(src, spots=args.spots, dark=args.dark, settings=settings,
                     progress=not args.quiet)
    if len(result.spot_set) == 0:
        hint = (" or --detect-frames all (only key frames were read)"
                if settings.detect_frames == "key" else "")
        raise SpotError("no spot found; give the spots with --spots FILE (see spots.json "
                        f"of another run for the format) or try --detect log{hint}", path=src)
    written = write_measure_outputs(result, out, force=args.force)
    if args.json:
        rows = [{k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                 for k, v in r.items()} for r in result.spots_table.to_dict(orient="records")]
        print(json.dumps({"out": str(out), "spots": rows}, default=str))
    elif not args.quiet:
        print(summary_table(result))
        print(f"wrote {len(written)} files to {out}")
    return 0


@_command
def _add_validate(sub: argparse._SubParsersAction) -> None:
    from .validate import QUICK_BATCHES, ValidationSettings

    p = sub.add_parser(
        "validate", help="check the reported uncertainties on simulated batches with known "
        "truth",
        description="Simulate many small batches (cards of 4-9 spots: blanks, standards, "
        "unknowns, extra blanks; random brightness, sensor noise, ambient light, drift), run "
        "the batch pipeline on each and compare with the truth: the distribution of "
        "(integral - truth) / integral_se, the coverage of the concentration intervals of "
        "the unknowns, and the fraction of blanks reported at or above the LOD. Writes "
        "summary.json, spots.csv, samples.csv and validation.png. Exit code 0 when every "
        "target is met, 1 when one is missed.")
    p.add_argument("--batches", type=int, default=None, metavar="N",
                   help=f"simulated batches (default {ValidationSettings.n_batches}; "
                   f"{QUICK_BATCHES} with --quick)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default: 0)")
    p.add_argument("--out", metavar="DIR", default="validate-output",
                   help="output folder (default: validate-output)")
    p.add_argument("--quick", action="store_true",
                   help="few batches; each acceptance band widened by 3 standard errors of "
                   "its own figure (binomial for coverage and rates)")
    p.add_argument("--workers", type=int, default=2, metavar="N",
                   help="processes (default: 2)")
    p.add_argument("--encoding", default="png", choices=["png", "tiff16", "jpeg", "h264"],
                   help="how the cards are written (default: png, lossless; jpeg and h264 "
                   "add compression bias)")
    p.add_argument("--keep", action="store_true",
                   help="keep the simulated recordings and batch outputs in OUT/work")
    p.add_argument("--force", action="store_true",
                   help="replace the outputs of an earlier validation in --out")
    p.add_argument("--weights", default=None, choices=["1/x2", "1/y2", "1/var"],
                   help="calibration weights, as batch --weights (default: none)")
    p.add_argument("--spot-cv", type=float, default=0.0, metavar="CV",
                   help="relative spot-to-spot (electrode) variability of the simulated "
                   "brightness (default: 0, replicates differ by measurement noise only)")
    p.add_argument("--noise", default="estimate", choices=["estimate", "true"],
                   help="estimate: gain and read noise estimated from each recording (the "
                   "pipeline's default); true: the simulator's values given to measure, as "
                   "a camera characterised with 'camera' would supply them")
    _common(p)
    p.set_defaults(run=_run_validate)


def _run_validate(args: argparse.Namespace) -> int:
    from pathlib import Path

    from .validate import (QUICK_BATCHES, ValidationSettings, format_report, run_validation,
                           write_validation_outputs)

    n = args.batches if args.batches is not None else (
        QUICK_BATCHES if args.quick else ValidationSettings.n_batches)
    settings = ValidationSettings(n_batches=n, seed=args.seed, workers=args.workers,
                                  encoding=args.encoding, keep_files=args.keep,
                                  weights=args.weights, spot_cv=args.spot_cv,
                                  noise=args.noise)
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        from .errors import OutputError

        raise OutputError("exists and is not a folder; choose another --out", path=out)
    from ._io import check_overwrite

    check_overwrite([out / name for name in ("summary.json", "spots.csv", "samples.csv",
                                             "validation.png")], force=args.force)
    result = run_validation(settings, work_dir=out / "work" if args.keep else None,
                            widen=args.quick, progress=not args.quiet)
    written = write_validation_outputs(result, out)
    if not args.quiet:
        print(format_report(result))
        print(f"wrote {', '.join(str(p) for p in written)}")
    return 0 if result.passed else 1


# --- END COMMANDS ---


def _print_err(text: str) -> None:
    """Print one line on stderr; undecodable file names (surrogates) are escaped."""
    enc = getattr(sys.stderr, "encoding", None) or "utf-8"
    print(text.encode(enc, "backslashreplace").decode(enc, "replace"), file=sys.stderr)


def build_parser() -> argparse.ArgumentParser:
    """The argparse parser with every subcommand."""
    parser = argparse.ArgumentParser(
        prog="ecl-quant",
        description="Turn camera recordings of electrochemiluminescence into "
        "concentrations with uncertainty.",
    )
    parser.add_argument("--version", action="version", version=f"ecl-quant {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    # Pipeline order in --help: one recording, tables, many recordings, then tools.
    order = ["measure", "calibrate", "quantify", "batch", "camera", "simulate", "validate"]
    rank = {name: i for i, name in enumerate(order)}
    for _name, add in sorted(_COMMANDS, key=lambda c: rank.get(c[0], len(order))):
        add(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; return the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: usage errors exit 2, --help/--version exit 0
        return int(exc.code or 0)
    if not getattr(args, "run", None):
        parser.print_help(sys.stderr)
        return 2
    debug = getattr(args, "debug", False)
    quiet = getattr(args, "quiet", False)

    def _show_warning(message, category, filename, lineno, file=None, line=None):  # type: ignore[no-untyped-def]
        if not quiet:
            _print_err(f"warning: {message}")

    with warnings.catch_warnings():
        warnings.simplefilter("default", EclQuantWarning)
        if not debug:
            warnings.showwarning = _show_warning
        try:
            return int(args.run(args))
        except EclQuantError as err:
            if debug:
                traceback.print_exc()
            _print_err(f"error: {err}")
            return 2
        except KeyboardInterrupt:
            print("error: interrupted", file=sys.stderr)
            return 130
        except OSError as err:  # the system refused a file the stage did not wrap
            if debug:
                traceback.print_exc()
            where = f"{err.filename}: " if err.filename else ""
            _print_err(f"error: {where}{err.strerror or err}; check the path, its permissions "
                       "and the free disk space")
            return 2
        except Exception as err:  # a defect: still one line, the traceback with --debug
            if debug:
                traceback.print_exc()
            first = (str(err).splitlines() or [""])[0]
            _print_err(f"error: internal error ({type(err).__name__}: {first}); this is a bug "
                       "in ecl-quant: rerun with --debug and report the traceback")
            return 3
