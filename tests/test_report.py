"""The HTML report of a batch: one self-contained file that renders in a browser.

Checks: every <img> is an embedded base64 PNG that Pillow (reference decoder) opens;
nothing refers to an outside resource and there is no script; the report names the
cautions, the parameters, the software versions and the device profile used; headless
Chromium (Debian's chromium package) renders it without console messages, every image
has naturalWidth > 0 (read back with --dump-dom after a probe script added to a copy),
and a screenshot is kept in test-artifacts/ (git-ignored).
"""

from __future__ import annotations

import base64
import io
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from ecl_quant.batch import CAUTIONS, QC_FLAGS, BatchSettings, run_batch
from ecl_quant.report import build_report, png_data_uri, thumbnail_png, write_report
from ecl_quant.simulate import SimulationSpec, simulate_recording
from ecl_quant.transfer import srgb_decode

REPO = Path(__file__).resolve().parents[1]
ARTIFACTS = REPO / "test-artifacts"


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def _tiny_recording(path: Path, concentration: float, seed: int) -> None:
    amp = 0.01 + 0.02 * concentration
    spec = SimulationSpec(size=(72, 96), n_rows=1, n_cols=3, radius_px=6.0, spacing_px=24.0,
                          amplitudes=(amp, amp, amp), n_frames=25, fps=8.0, onset_s=0.4,
                          rise_s=0.3, decay_s=0.8, drift_px=0.0, n_hot_pixels=1,
                          encoding="jpeg", seed=seed)
    simulate_recording(path, spec)


@pytest.fixture(scope="module")
def report_dir(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    study = root / "study"
    study.mkdir()
    rows = ["path,sample,role,concentration,transfer"]
    # A device profile whose response is the sRGB decoding (IEC 61966-2-1) table: the
    # measurement stays right and the report must show the profile.
    codes = np.arange(256) / 255.0
    profile = {"schema": "ecl_quant.device_profile", "version": 1,
               "device": "test phone (sRGB table)", "method": "IEC 61966-2-1 formula",
               "response": {c: [float(v) for v in srgb_decode(codes)]
                            for c in ("red", "green", "blue")}}
    (study / "phone.json").write_text(json.dumps(profile))
    for k, (sample, role, conc) in enumerate([("S0", "standard", 0.0), ("S5", "standard", 5.0),
                                               ("S10", "standard", 10.0),
                                               ("S20", "standard", 20.0),
                                               ("U", "unknown", 8.0)]):
        _tiny_recording(study / f"rec{k}", conc, seed=100 + k)
        rows.append(f"rec{k},{sample},{role},{'' if role == 'unknown' else conc},"
                    "profile=phone.json")
    (study / "manifest.csv").write_text("\n".join(rows) + "\n")
    out = root / "out"
    result = run_batch(study / "manifest.csv",
                       BatchSettings(out_dir=out, workers=1, progress=False),
                       finalize=write_report)
    assert result.exit_code == 0, result.errors
    return out


def _parse(html_text: str) -> list[tuple[str, dict[str, str | None]]]:
    p = _Collect()
    p.feed(html_text)
    return p.tags


def test_report_is_self_contained_with_valid_pngs(report_dir):
    from PIL import Image

    text = (report_dir / "report.html").read_text(encoding="utf-8")
    tags = _parse(text)
    imgs = [a for t, a in tags if t == "img"]
    # calibration plot + overlay and curves of each of the 5 recordings
    assert len(imgs) == 1 + 2 * 5
    for attrs in imgs:
        src = attrs.get("src") or ""
        assert src.startswith("data:image/png;base64,")
        raw = base64.b64decode(src.split(",", 1)[1], validate=True)
        with Image.open(io.BytesIO(raw)) as im:  # Pillow is the reference PNG decoder
            assert im.format == "PNG"
            im.load()
            assert im.width > 0 and im.height > 0
        assert attrs.get("alt")
    assert not any(t in ("script", "link", "iframe", "object", "embed") for t, _ in tags)
    for _t, attrs in tags:
        for key in ("src", "href"):
            val = attrs.get(key)
            if val is not None:
                assert val.startswith(("data:", "#")), val
    assert not re.search(r"url\((?!\s*['\"]?data:)", text)
    assert "@import" not in text


def test_report_content(report_dir):
    text = (report_dir / "report.html").read_text(encoding="utf-8")
    for caution in CAUTIONS:
        assert caution.replace('"', "&quot;") in text
    for flag in QC_FLAGS:
        assert f">{flag}</span>" in text  # every flag is explained
    batch = json.loads((report_dir / "batch.json").read_text())
    for name, version in batch["versions"].items():
        assert f"<td>{name}</td><td>{version}</td>" in text
    assert "Camera device profile: phone.json" in text
    assert "test phone (sRGB table)" in text
    assert ">U</td>" in text  # the unknown's row in the results table


def test_report_is_rebuilt_from_the_folder(report_dir):
    # The report is a function of the batch folder: rebuilding gives the same file.
    assert build_report(report_dir) == (report_dir / "report.html").read_text(encoding="utf-8")


def test_png_helpers_reject_non_png(tmp_path):
    with pytest.raises(ValueError):
        png_data_uri(b"GIF89a")
    from PIL import Image

    im = Image.new("RGB", (1000, 300), (200, 30, 30))
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    small = thumbnail_png(buf.getvalue(), max_px=200)
    with Image.open(io.BytesIO(small)) as t:
        assert t.size == (200, 60)


_CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")

_PROBE = ("<script>console.log('ecl-quant-probe');window.addEventListener('load',function(){"
          "var r=[];for(var i=0;i<document.images.length;i++){r.push(document.images[i]"
          ".naturalWidth)}document.body.setAttribute('data-widths',r.join(','));});</script>")


def _chromium(args, tmp_path):
    cmd = [_CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
           "--enable-logging=stderr", "--v=0", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120, check=False)


@pytest.mark.browser
@pytest.mark.skipif(_CHROMIUM is None, reason="needs Debian's chromium package (.ci/run installs it)")
def test_report_renders_in_headless_chromium(report_dir, tmp_path):
    from PIL import Image

    page = tmp_path / "probe.html"
    text = (report_dir / "report.html").read_text(encoding="utf-8")
    assert text.count("</body>") == 1
    page.write_text(text.replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    run = _chromium(["--virtual-time-budget=5000", "--dump-dom", page.as_uri()], tmp_path)
    assert run.returncode == 0, run.stderr[-2000:]
    console = [ln for ln in run.stderr.splitlines() if ":CONSOLE" in ln]
    # The probe shows that console capture works; nothing else may be logged.
    assert any("ecl-quant-probe" in ln for ln in console), run.stderr[-2000:]
    assert [ln for ln in console if "ecl-quant-probe" not in ln] == []
    m = re.search(r'data-widths="([0-9,]*)"', run.stdout)
    assert m, run.stdout[-2000:]
    widths = [int(w) for w in m.group(1).split(",") if w]
    assert len(widths) == 11 and all(w > 0 for w in widths)

    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "report.png"
    shot.unlink(missing_ok=True)
    run = _chromium(["--window-size=1280,3000", "--hide-scrollbars",
                     f"--screenshot={shot}", (report_dir / "report.html").as_uri()], tmp_path)
    assert run.returncode == 0, run.stderr[-2000:]
    assert [ln for ln in run.stderr.splitlines() if ":CONSOLE" in ln] == []
    with Image.open(shot) as im:
        assert im.size == (1280, 3000)
        arr = np.asarray(im.convert("L"), dtype=float)
    assert arr.std() > 5  # not a blank page


def test_html_escapes_text(tmp_path):
    # A sample name with markup must come out as text (html.escape is the reference).
    (tmp_path / "batch.json").write_text(json.dumps({"parameters": {"units": "umol/L"}}))
    (tmp_path / "results.csv").write_text(
        "sample,n,response_mean,concentration,se,ci_low,ci_high,level,units,recordings,flags\n"
        "<b>x</b>,1,1,1,0.1,0.8,1.2,0.95,umol/L,r,\n")
    out = build_report(tmp_path)
    assert "&lt;b&gt;x&lt;/b&gt;" in out and "<b>x</b>" not in out
