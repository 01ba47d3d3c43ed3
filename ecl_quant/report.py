"""Plots and the self-contained HTML report of a batch.

The report is one HTML file: plain semantic HTML with its own CSS, every image embedded
as a base64 PNG ``data:`` URI, no script and no external resource, so it opens the same
in any browser, offline, and can be mailed or archived as it is.

It is built from what a batch leaves in its output folder (results.csv,
measurements.csv, qc.csv, errors.csv, calibration.json, batch.json and the per-recording
overlay.png / curves.png), so it can be rebuilt at any time with :func:`write_report`.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from ._io import write_text_atomic
from .batch import CAUTIONS, QC_FLAGS, RESULT_FLAGS

__all__ = [
    "png_data_uri",
    "thumbnail_png",
    "build_report",
    "write_report",
    "REPORT_NAME",
]

REPORT_NAME = "report.html"
_THUMB_PX = 480


# ------------------------------------------------------------------ images


def png_data_uri(png: bytes) -> str:
    """A ``data:image/png;base64,...`` URI for PNG bytes.

    Raises
    ------
    ValueError
        When ``png`` does not start with the PNG signature.
    """
    if not png.startswith(b"\x89PNG\r\n\x1a\n"):
        raise ValueError("not PNG data")
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def thumbnail_png(source: str | Path | bytes, *, max_px: int = _THUMB_PX) -> bytes:
    """Shrink an image so its longer side is at most ``max_px`` and return PNG bytes."""
    from PIL import Image

    fh = io.BytesIO(source) if isinstance(source, bytes) else open(source, "rb")
    with fh, Image.open(fh) as img:
        img.load()
        im = img.convert("RGBA" if img.mode in ("RGBA", "LA", "P") else "RGB")
        im.thumbnail((max_px, max_px), Image.Resampling.LANCZOS)
        out = io.BytesIO()
        im.save(out, format="PNG", optimize=True)
    return out.getvalue()


# ------------------------------------------------------------------ HTML helpers

_CSS = """
:root{--ink:#1d2430;--muted:#5b6472;--line:#d6dbe2;--accent:#0f6e6e;--accent-bg:#e4f1f1;
--warn:#8a5300;--warn-bg:#fff2d9;--bad:#9f1f27;--bad-bg:#fde6e8;--ok:#1b6e3a;--ok-bg:#e2f3e7;
--band:#f6f8fa;--paper:#fff}
*{box-sizing:border-box}
body{margin:0;background:#e9edf1;color:var(--ink);
font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif}
main{max-width:1120px;margin:0 auto;background:var(--paper);padding:1.2rem 2rem 3rem;
box-shadow:0 0 0 1px var(--line)}
header.top{border-bottom:3px solid var(--accent);margin-bottom:1rem;padding-bottom:.6rem}
header.top h1{margin:.2rem 0;font-size:1.7rem;letter-spacing:.01em}
header.top p{margin:.15rem 0;color:var(--muted)}
h2{margin:2.2rem 0 .6rem;font-size:1.3rem;border-bottom:1px solid var(--line);padding-bottom:.2rem}
h3{margin:1.3rem 0 .4rem;font-size:1.05rem}
nav.toc ol{columns:3;margin:.4rem 0 0;padding-left:1.2rem}
nav.toc a{color:var(--accent)}
aside.caution{border-left:5px solid var(--warn);background:var(--warn-bg);
padding:.5rem 1rem;margin:1rem 0}
aside.caution h2{border:0;margin:.2rem 0;font-size:1.05rem}
aside.caution ul{margin:.2rem 0 .3rem;padding-left:1.2rem}
.tiles{display:flex;flex-wrap:wrap;gap:.6rem;margin:.8rem 0}
.tile{flex:1 1 9rem;border:1px solid var(--line);border-radius:6px;padding:.45rem .7rem}
.tile b{display:block;font-size:1.45rem;line-height:1.2}
.tile span{color:var(--muted);font-size:.85rem}
.tile.bad{border-color:var(--bad);background:var(--bad-bg)}
.tile.good{border-color:var(--ok);background:var(--ok-bg)}
.scroll{overflow-x:auto}
table{border-collapse:collapse;width:100%;margin:.4rem 0 1rem;font-variant-numeric:tabular-nums;
font-size:.92rem}
caption{text-align:left;color:var(--muted);font-size:.85rem;padding:.2rem 0}
th,td{padding:.28rem .55rem;border-bottom:1px solid var(--line);text-align:left;vertical-align:top}
thead th{background:var(--accent-bg);border-bottom:2px solid var(--accent)}
tbody tr:nth-child(even){background:var(--band)}
td.num,th.num{text-align:right;white-space:nowrap}
td.path{font-family:ui-monospace,"SFMono-Regular",Menlo,Consolas,monospace;font-size:.82rem;
word-break:break-all}
.flag{display:inline-block;margin:0 .2rem .15rem 0;padding:0 .5em;border-radius:.7em;
font-size:.78rem;border:1px solid var(--warn);background:var(--warn-bg);color:var(--warn)}
.flag.severe{border-color:var(--bad);background:var(--bad-bg);color:var(--bad)}
.flag.none{border-color:var(--ok);background:var(--ok-bg);color:var(--ok)}
figure{margin:0}
figure.wide img{max-width:100%;height:auto;border:1px solid var(--line)}
figcaption{color:var(--muted);font-size:.85rem;margin:.3rem 0}
.cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(320px,1fr));gap:1rem}
article.card{border:1px solid var(--line);border-radius:6px;padding:.5rem .7rem}
article.card h3{margin:.1rem 0 .3rem;font-size:.98rem;word-break:break-all}
article.card img{width:100%;height:auto;display:block;margin:.3rem 0;border:1px solid var(--line);
background:#000}
article.card.failed{border-color:var(--bad);background:var(--bad-bg)}
dl.flags dt{font-weight:600;margin-top:.4rem}
dl.flags dd{margin:0 0 0 1.2rem;color:var(--ink)}
pre{background:var(--band);border:1px solid var(--line);padding:.6rem;overflow-x:auto;
font-size:.8rem}
details{margin:.5rem 0}
summary{cursor:pointer;color:var(--accent);font-weight:600}
p.note{color:var(--muted);font-size:.9rem}
footer{margin-top:2.5rem;color:var(--muted);font-size:.85rem;border-top:1px solid var(--line);
padding-top:.6rem}
@media print{body{background:#fff}main{box-shadow:none;max-width:none;padding:0}
nav.toc{display:none}article.card{break-inside:avoid}}
"""

_SEVERE = {"saturated", "below_lod", "above_range", "failed", "no_solution", "no_valid_reading"}


def _e(value: Any) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _is_missing(value: Any) -> bool:
    if value is None:
        return True
    try:
        return bool(isinstance(value, float) and math.isnan(value))
    except TypeError:
        return False


def _fmt(value: Any, digits: int = 4) -> str:
    """Numbers with ``digits`` significant figures; text as is; missing as an en dash."""
    if _is_missing(value) or (isinstance(value, str) and not value.strip()):
        return "\u2013"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not math.isfinite(v):
            return str(v)
        if v == 0:
            return "0"
        if 1e-3 <= abs(v) < 1e6:
            return f"{v:.{digits}g}"
        return f"{v:.{max(digits - 1, 1)}e}"
    return str(value)


def _flag_words(text: Any) -> list[str]:
    if _is_missing(text):
        return []
    return [w.strip() for w in str(text).replace(",", ";").split(";") if w.strip()]


def _badges(text: Any, *, none_label: str = "none") -> str:
    words = _flag_words(text)
    if not words:
        return f'<span class="flag none">{_e(none_label)}</span>'
    return "".join(
        f'<span class="flag{" severe" if w in _SEVERE else ""}">{_e(w)}</span>' for w in words)


def _table(rows: Sequence[Mapping[str, Any]], columns: Sequence[tuple[str, str]], *,
           caption: str | None = None, numeric: Iterable[str] = (),
           flags: Iterable[str] = (), paths: Iterable[str] = (),
           digits: int = 4) -> str:
    numeric, flags, paths = set(numeric), set(flags), set(paths)
    out = ['<div class="scroll"><table>']
    if caption:
        out.append(f"<caption>{_e(caption)}</caption>")
    num_cls = ' class="num"'
    out.append("<thead><tr>" + "".join(
        f'<th scope="col"{num_cls if k in numeric else ""}>{_e(label)}</th>'
        for k, label in columns) + "</tr></thead><tbody>")
    for r in rows:
        cells = []
        for k, _label in columns:
            v = r.get(k)
            if k in flags:
                cells.append(f"<td>{_badges(v)}</td>")
            elif k in numeric:
                cells.append(f'<td class="num">{_e(_fmt(v, digits))}</td>')
            elif k in paths:
                cells.append(f'<td class="path">{_e(_fmt(v))}</td>')
            else:
                cells.append(f"<td>{_e(_fmt(v))}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    if not rows:
        out.append(f'<tr><td colspan="{len(columns)}">(none)</td></tr>')
    out.append("</tbody></table></div>")
    return "".join(out)


def _kv_table(items: Mapping[str, Any], *, caption: str | None = None) -> str:
    rows = [{"k": k, "v": (json.dumps(v, default=str) if isinstance(v, (dict, list, tuple))
                           else v)} for k, v in items.items()]
    return _table(rows, [("k", "name"), ("v", "value")], caption=caption)


def _records(df: Any) -> list[dict[str, Any]]:
    if df is None:
        return []
    return [dict(r) for r in df.to_dict(orient="records")]


def _img(uri: str, alt: str) -> str:
    return f'<img src="{_e(uri)}" alt="{_e(alt)}">'


# ------------------------------------------------------------------ loading


def _read_csv(path: Path) -> Any:
    import pandas as pd

    if not path.is_file():
        return None
    try:
        return pd.read_csv(path, keep_default_na=True)
    except (pd.errors.EmptyDataError, ValueError):
        return None


def _read_json(path: Path) -> Any:
    if not path.is_file():
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


# ------------------------------------------------------------------ sections


def _section_results(results: Any, batch: Mapping[str, Any]) -> str:
    units = batch.get("parameters", {}).get("units", "")
    level = float(batch.get("parameters", {}).get("level", 0.95))
    rows = _records(results)
    for r in rows:
        lo, hi = r.get("ci_low"), r.get("ci_high")
        r["ci"] = (f"{_fmt(lo)} \u2013 {_fmt(hi)}" if not (_is_missing(lo) or _is_missing(hi))
                   else None)
    cols = [("sample", "sample"), ("n", "n"), ("concentration", f"concentration ({units})"),
            ("se", "SE"), ("ci", f"{level:.0%} CI"), ("response_mean", "mean response"),
            ("flags", "flags")]
    body = _table(rows, cols, numeric=("n", "concentration", "se", "response_mean"),
                  flags=("flags",),
                  caption=f"Unknowns: concentration in {units} with standard error and "
                          f"{level:.0%} confidence interval from the calibration.")
    return f'<section id="results"><h2>Results</h2>{body}</section>'


def _section_calibration(out_dir: Path, cal_doc: Any, batch: Mapping[str, Any]) -> str:
    params = batch.get("parameters", {})
    level = float(params.get("level", 0.95))
    parts = ['<section id="calibration"><h2>Calibration</h2>']
    cal_error = batch.get("calibration_error")
    if cal_error:
        parts.append(f'<p><span class="flag severe">failed</span> {_e(cal_error)}</p>')
    cal = None
    if cal_doc is not None:
        try:
            from .calibration import load_calibration

            cal = load_calibration(out_dir / "calibration.json")
        except Exception as err:  # noqa: BLE001 - the report shows what it can
            parts.append(f"<p>calibration.json could not be loaded: {_e(err)}</p>")
    if cal is not None:
        try:
            from .calibration import plot_calibration

            png = plot_calibration(cal, level=level)
        except Exception as err:  # noqa: BLE001
            parts.append(f"<p>calibration plot failed: {_e(err)}</p>")
        else:
            parts.append(
                '<figure class="wide">' + _img(png_data_uri(png), "calibration plot") +
                f"<figcaption>Calibration on the standards and blanks in use (one point per "
                f"spot): fitted curve, {level:.0%} confidence band of the curve and prediction "
                "band of one new reading, LOD and LOQ; residuals below.</figcaption></figure>")
        pf = cal.parameters_frame()
        parts.append(_table(_records(pf), [("parameter", "parameter"), ("value", "value"),
                                           ("se", "SE"), ("ci_low", f"{level:.0%} CI low"),
                                           ("ci_high", f"{level:.0%} CI high")],
                            numeric=("value", "se", "ci_low", "ci_high"), digits=5,
                            caption=f"Model {cal.model}; response {params.get('response', '')}"))
        parts.append(f"<pre>{_e(cal.summary())}</pre>")
    parts.append("</section>")
    return "".join(parts)


def _section_qc(qc: Any) -> str:
    rows = _records(qc)
    cols = [("recording", "recording"), ("kind", "kind"), ("n_frames", "frames"),
            ("n_spots", "spots"), ("max_drift_px", "max drift (px)"),
            ("blur_score", "sharpness"), ("ambient_fraction", "ambient"),
            ("min_snr", "min SNR"), ("saturated_spots", "saturated spots"),
            ("flags", "flags")]
    numeric = ("n_frames", "n_spots", "max_drift_px", "blur_score", "ambient_fraction",
               "min_snr", "saturated_spots")
    parts = ['<section id="qc"><h2>Field quality control</h2>',
             _table(rows, cols, numeric=numeric, flags=("flags",), digits=3,
                    caption="One row per recording; flags explained below."),
             "<h3>What the flags mean</h3><dl class=\"flags\">"]
    for name, text in {**QC_FLAGS, **RESULT_FLAGS}.items():
        parts.append(f"<dt>{_badges(name)}</dt><dd>{_e(text)}</dd>")
    parts.append("</dl></section>")
    return "".join(parts)


def _section_recordings(out_dir: Path, qc: Any, errors: Any) -> str:
    parts = ['<section id="recordings"><h2>Recordings</h2>',
             '<p class="note">Overlay: the spots found (numbers as in measurements.csv) on '
             "the projection of the recording; curves: net signal of each spot against "
             "time.</p><div class=\"cards\">"]
    for r in _records(qc):
        rid = str(r.get("recording"))
        folder = out_dir / "recordings" / rid
        imgs = []
        for name, alt in (("overlay.png", "spots overlay"), ("curves.png", "spot curves")):
            p = folder / name
            if p.is_file():
                try:
                    imgs.append(_img(png_data_uri(thumbnail_png(p)), f"{rid}: {alt}"))
                except Exception:  # noqa: BLE001 - an unreadable picture is skipped
                    continue
        parts.append(
            f'<article class="card"><h3>{_e(rid)}</h3>'
            f'<p>{_badges(r.get("flags"))}</p>{"".join(imgs)}'
            f'<p class="note">{_e(r.get("path"))}</p></article>')
    for r in _records(errors):
        parts.append(
            f'<article class="card failed"><h3>{_e(r.get("recording") or r.get("path"))}</h3>'
            f'<p>{_badges("failed")} {_e(r.get("error"))}: {_e(r.get("message"))}</p>'
            "</article>")
    parts.append("</div></section>")
    return "".join(parts)


def _section_errors(errors: Any) -> str:
    rows = _records(errors)
    if not rows:
        return ('<section id="errors"><h2>Errors</h2><p>Every recording was measured.</p>'
                "</section>")
    cols = [("recording", "recording"), ("path", "path"), ("lines", "manifest lines"),
            ("stage", "stage"), ("error", "error"), ("message", "message")]
    return ('<section id="errors"><h2>Errors</h2>'
            + _table(rows, cols, paths=("path",),
                     caption="These recordings were left out; the rest of the batch went on.")
            + "</section>")


def _section_measurements(measurements: Any) -> str:
    rows = _records(measurements)
    cols = [("recording", "recording"), ("spot", "spot"), ("sample", "sample"),
            ("role", "role"), ("concentration", "conc."), ("response", "response"),
            ("response_se", "SE"), ("snr", "SNR"), ("used", "used"), ("flags", "flags")]
    return ('<section id="measurements"><h2>Measurements</h2><details><summary>'
            f"All {len(rows)} spot measurements</summary>"
            + _table(rows, cols, numeric=("spot", "concentration", "response", "response_se",
                                          "snr"), flags=("flags",))
            + "</details></section>")


def _section_parameters(batch: Mapping[str, Any], profiles: Mapping[str, Any]) -> str:
    parts = ['<section id="parameters"><h2>Parameters and software</h2>']
    params = batch.get("parameters", {})
    if params:
        parts.append(_kv_table(params, caption="Batch parameters"))
    for name in ("measure_settings", "qc_limits"):
        if batch.get(name):
            parts.append(_kv_table(batch[name], caption=name.replace("_", " ")))
    recs = batch.get("recordings") or []
    if recs:
        rows = [{**r, "dark": Path(r["dark"]).name if r.get("dark") else None,
                 "spots_file": Path(r["spots_file"]).name if r.get("spots_file") else None}
                for r in recs]
        parts.append(_table(rows, [("rec_id", "recording"), ("status", "this run"),
                                   ("channel", "channel"), ("transfer", "transfer"),
                                   ("exposure_s", "exposure_s (given)"), ("dark", "dark"),
                                   ("spots_file", "spots file"), ("elapsed_s", "time (s)")],
                            numeric=("exposure_s", "elapsed_s"), digits=3,
                            caption="Per-recording settings (from the manifest) and what "
                                    "this run did: measured, taken from the cache, or failed"))
    if batch.get("versions"):
        parts.append(_kv_table(batch["versions"], caption="Software versions"))
    for path, prof in profiles.items():
        parts.append(f"<h3>Camera device profile: {_e(Path(path).name)}</h3>"
                     f'<p class="note">{_e(path)}</p>')
        if isinstance(prof, Mapping):
            flat = {k: v for k, v in prof.items() if not isinstance(v, (list, dict))
                    or len(json.dumps(v, default=str)) < 160}
            parts.append(_kv_table(flat))
            parts.append("<details><summary>Full profile (JSON)</summary><pre>"
                         + _e(json.dumps(prof, indent=2, default=str)) + "</pre></details>")
        else:
            parts.append(f"<pre>{_e(prof)}</pre>")
    parts.append("</section>")
    return "".join(parts)


def _cautions_html() -> str:
    items = "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
    return (f'<aside class="caution" id="cautions" role="note"><h2>Cautions</h2>'
            f"<ul>{items}</ul></aside>")


def _tiles(batch: Mapping[str, Any], results: Any, errors: Any) -> str:
    counts = batch.get("counts", {})
    n_err = 0 if errors is None else len(errors)
    n_flag = 0
    if results is not None and "flags" in results.columns:
        n_flag = int(sum(bool(_flag_words(v)) for v in results["flags"]))
    tiles = [
        ("", counts.get("recordings", "\u2013"), "recordings"),
        ("good" if n_err == 0 else "", counts.get("measured_ok", "\u2013"), "measured"),
        ("bad" if n_err else "good", n_err, "failed"),
        ("", 0 if results is None else len(results), "unknowns quantified"),
        ("bad" if n_flag else "good", n_flag, "results with flags"),
    ]
    return '<div class="tiles">' + "".join(
        f'<div class="tile {cls}"><b>{_e(v)}</b><span>{_e(label)}</span></div>'
        for cls, v, label in tiles) + "</div>"


def build_report(out_dir: str | Path, *, title: str | None = None) -> str:
    """Build the HTML report of a batch output folder.

    Parameters
    ----------
    out_dir : str or Path
        A folder written by :func:`ecl_quant.batch.run_batch`.
    title : str, optional
        Heading; defaults to the manifest's folder name.

    Returns
    -------
    str
        The complete HTML document.
    """
    out = Path(out_dir)
    batch = _read_json(out / "batch.json") or {}
    results = _read_csv(out / "results.csv")
    measurements = _read_csv(out / "measurements.csv")
    qc = _read_csv(out / "qc.csv")
    errors = _read_csv(out / "errors.csv")
    cal_doc = _read_json(out / "calibration.json")
    profiles: dict[str, Any] = {}
    for p in batch.get("profiles", []) or []:
        doc = _read_json(Path(p))
        profiles[str(p)] = doc if doc is not None else "(profile file not readable)"
    manifest = batch.get("manifest", "")
    heading = title or f"ECL batch report: {Path(manifest).parent.name or 'batch'}"
    created = batch.get("finished") or datetime.now(timezone.utc).isoformat(timespec="seconds")
    toc = "".join(f'<li><a href="#{a}">{t}</a></li>' for a, t in (
        ("results", "Results"), ("calibration", "Calibration"), ("qc", "Quality control"),
        ("recordings", "Recordings"), ("errors", "Errors"), ("measurements", "Measurements"),
        ("parameters", "Parameters and software"), ("cautions", "Cautions")))
    body = "".join([
        '<header class="top">', f"<h1>{_e(heading)}</h1>",
        f"<p>Manifest <code>{_e(manifest)}</code></p>",
        f"<p>Finished {_e(created)} \u00b7 ecl-quant "
        f"{_e(batch.get('versions', {}).get('ecl_quant', ''))}</p></header>",
        _tiles(batch, results, errors),
        _cautions_html(),
        f'<nav class="toc" aria-label="contents"><ol>{toc}</ol></nav>',
        _section_results(results, batch),
        _section_calibration(out, cal_doc, batch),
        _section_qc(qc),
        _section_recordings(out, qc, errors),
        _section_errors(errors),
        _section_measurements(measurements),
        _section_parameters(batch, profiles),
        "<footer><p>Made by ecl-quant from the files in this folder; rebuild with "
        "<code>ecl_quant.report.write_report(folder)</code>. Research measurements only."
        "</p></footer>",
    ])
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{_e(heading)}</title><style>{_CSS}</style></head>"
            f"<body><main>{body}</main></body></html>\n")


def write_report(out_dir: str | Path, *, path: str | Path | None = None,
                 title: str | None = None) -> Path:
    """Write ``report.html`` (atomically) into a batch output folder; return its path."""
    target = Path(path) if path is not None else Path(out_dir) / REPORT_NAME
    write_text_atomic(target, build_report(out_dir, title=title))
    return target
