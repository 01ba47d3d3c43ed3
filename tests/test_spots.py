"""Spots: shapes and cutouts, spot files, grid order, detection, projections, drift.

Outside references named beside each check: elementary geometry (areas of circles,
rectangles, triangles), scikit-image (draw.disk, feature.blob_log,
registration.phase_cross_correlation), OpenCV (cv2.phaseCorrelate sign convention, see
CAMERA_NOTES section 3, and its peak and response), numpy (block means),
scipy.ndimage.shift (sub-pixel test images), jsonschema.
"""

from __future__ import annotations

import json
import math
import warnings

import cv2
import numpy as np
import pytest

from ecl_quant.errors import InputFormatError, NoSpotsWarning, SpotError
from ecl_quant.spots import (
    SPOTS_FORMAT,
    BackgroundRegion,
    DriftTracker,
    ProjectionAccumulator,
    SpotSet,
    annulus_cutout,
    background_surface,
    detect_spots,
    downscale_for_drift,
    drift_plane,
    estimate_shift,
    isolated_pixels,
    load_spots,
    log_blobs,
    make_spot,
    order_row_major,
    save_spots,
    spot_cutout,
)


def _disc_image(shape, centres, radius, amplitudes, *, edge=0.5, noise=0.0, seed=0,
                background=0.0):
    """Discs with a soft (logistic) edge on a flat background, plus Gaussian noise."""
    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    img = np.full(shape, background, np.float64)
    for (x, y), a in zip(centres, amplitudes):
        rho = np.hypot(xx - x, yy - y)
        img += a / (1.0 + np.exp((rho - radius) / edge))
    img += np.random.default_rng(seed).normal(0.0, noise, shape)
    return img.astype(np.float32)


def _grid(n_rows, n_cols, spacing, origin, tilt_deg=0.0, jitter=0.0, seed=0):
    rng = np.random.default_rng(seed)
    c, s = math.cos(math.radians(tilt_deg)), math.sin(math.radians(tilt_deg))
    pts = []
    for r in range(n_rows):
        for q in range(n_cols):
            u, v = q * spacing, r * spacing
            pts.append((origin[0] + c * u - s * v + rng.normal(0, jitter),
                        origin[1] + s * u + c * v + rng.normal(0, jitter)))
    return pts


# ------------------------------------------------------------------ shapes and cutouts


@pytest.mark.parametrize("x, y, r", [(20.0, 15.0, 6.0), (20.3, 14.7, 3.2), (30.5, 30.5, 12.0)])
def test_circle_cutout_area_and_centre(x, y, r):
    # Area of a disc: pi r^2 (elementary geometry); weight-weighted centroid = centre.
    spot = make_spot(1, "circle", (x, y, r))
    cut = spot_cutout(spot)
    assert spot.area_px == pytest.approx(math.pi * r * r)
    assert cut.area_px == pytest.approx(math.pi * r * r, rel=2e-3)
    rr, cc = np.mgrid[cut.slices]
    assert (cut.weights * cc).sum() / cut.weights.sum() == pytest.approx(x, abs=0.01)
    assert (cut.weights * rr).sum() / cut.weights.sum() == pytest.approx(y, abs=0.01)
    assert cut.weights.min() >= 0 and cut.weights.max() <= 1


def test_circle_cutout_matches_skimage_disk():
    # skimage.draw.disk selects pixels whose centre lies inside the circle; those are the
    # pixels our coverage weights put at >= 0.5 except along the very edge.
    from skimage.draw import disk

    spot = make_spot(1, "circle", (25.0, 20.0, 7.5))
    cut = spot_cutout(spot).clipped((50, 50))
    ours = np.zeros((50, 50), bool)
    ours[cut.slices] = cut.weights >= 0.5
    ref = np.zeros((50, 50), bool)
    ref[disk((20.0, 25.0), 7.5, shape=(50, 50))] = True
    assert (ours != ref).sum() <= 4


def test_rect_and_polygon_cutouts():
    # Rectangle: exact overlap area (elementary geometry); triangle: base * height / 2.
    rect = make_spot(1, "rect", (3.2, 4.6, 10.7, 9.1))
    assert spot_cutout(rect).area_px == pytest.approx(7.5 * 4.5, rel=1e-6)
    assert (rect.x_px, rect.y_px) == pytest.approx((6.95, 6.85))
    tri = make_spot(2, "polygon", (0.0, 0.0, 20.0, 0.0, 0.0, 10.0))
    assert tri.area_px == pytest.approx(100.0)
    assert (tri.x_px, tri.y_px) == pytest.approx((20 / 3, 10 / 3))
    assert spot_cutout(tri).area_px == pytest.approx(100.0, rel=0.01)
    assert tri.radius_px == pytest.approx(math.sqrt(100 / math.pi))


@pytest.mark.parametrize("shape, params", [
    ("circle", (1.0, 2.0, 0.0)), ("circle", (1.0, 2.0)), ("rect", (5, 5, 4, 9)),
    ("polygon", (0, 0, 1, 1)), ("polygon", (0, 0, 1, 1, 2, 2)), ("hexagon", (1, 2, 3)),
    ("circle", (float("nan"), 1, 2)),
])
def test_degenerate_shapes_are_rejected(shape, params):
    with pytest.raises(SpotError):
        make_spot(1, shape, params)


def test_annulus_masks_other_spots():
    # Pixel-centre annulus against skimage.draw.disk: outer disk minus inner disk.
    from skimage.draw import disk

    cut = annulus_cutout(30.0, 30.0, 8.0, 14.0, shape=(60, 60), exclude=[(44.0, 30.0, 6.0)])
    full = np.zeros((60, 60), bool)
    full[cut.slices] = cut.weights > 0
    ring = np.zeros((60, 60), bool)
    ring[disk((30, 30), 14.0, shape=(60, 60))] = True
    inner = np.zeros((60, 60), bool)
    inner[disk((30, 30), 8.0, shape=(60, 60))] = True
    other = np.zeros((60, 60), bool)
    other[disk((30, 44), 6.0, shape=(60, 60))] = True
    expect = ring & ~inner & ~other
    assert (full != expect).sum() <= 8  # boundary conventions (< vs <=) only
    assert not (full & other).any()


def test_cutout_clipped_at_frame_edge():
    cut = spot_cutout(make_spot(1, "circle", (1.0, 1.0, 4.0))).clipped((10, 10))
    assert cut.y0 == 0 and cut.x0 == 0 and cut.weights.shape == (6, 6)


# ------------------------------------------------------------------ spot files


def test_spot_file_round_trip_is_exact(tmp_path):
    spots = (make_spot(1, "circle", (10.123456789, 20.5, 4.25), label="A1"),
             make_spot(2, "rect", (30, 5, 42.5, 17)),
             make_spot(3, "polygon", (50, 5, 60, 5, 55, 15)))
    bg = (BackgroundRegion("rect", (0, 30, 20, 40), (1, 2)),)
    original = SpotSet(spots, (48, 64), bg, {"note": "hand drawn"})
    path = tmp_path / "spots.json"
    save_spots(original, path)
    doc = json.loads(path.read_text())
    assert doc["format"] == SPOTS_FORMAT and doc["version"] == 1
    back = load_spots(path)
    assert back.spots == original.spots
    assert back.backgrounds == original.backgrounds
    assert back.frame_shape == (48, 64)
    assert back.provenance["note"] == "hand drawn"


def test_schema_is_valid_json_schema():
    # The schema itself must be a valid Draft 2020-12 schema (jsonschema reference).
    import jsonschema

    from ecl_quant.spots import _schema

    jsonschema.Draft202012Validator.check_schema(_schema())


@pytest.mark.parametrize("doc, words", [
    ({"format": "ecl-quant-spots", "version": 1, "spots": [{"shape": "circle", "x": 1,
                                                              "y": 1}]}, "radius"),
    ({"format": "ecl-quant-spots", "version": 1, "spots": [{"shape": "ellipse", "x": 1}]},
     "ellipse"),
    ({"format": "ecl-quant-spots", "version": 1, "spots": []}, "spots"),
    ({"version": 1, "spots": [{"shape": "circle", "x": 1, "y": 1, "radius": 2}]}, "format"),
    ({"format": "ecl-quant-spots", "version": 1,
      "spots": [{"shape": "polygon", "points": [[0, 0], [1, "a"], [2, 2]]}]}, "points"),
    ({"format": "ecl-quant-spots", "version": 1,
      "spots": [{"number": 1, "shape": "circle", "x": 5, "y": 5, "radius": 2},
                {"number": 1, "shape": "circle", "x": 9, "y": 5, "radius": 2}]}, "unique"),
    ({"format": "ecl-quant-spots", "version": 7,
      "spots": [{"shape": "circle", "x": 5, "y": 5, "radius": 2}]}, "newer"),
    ({"format": "ecl-quant-spots", "version": 1,
      "spots": [{"number": 1, "shape": "circle", "x": 5, "y": 5, "radius": 2}],
      "background": [{"shape": "rect", "x0": 0, "y0": 0, "x1": 3, "y1": 3, "spots": [4]}]},
     "unknown spot"),
])
def test_malformed_spot_files_raise_one_line_spot_errors(tmp_path, doc, words):
    path = tmp_path / "s.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(SpotError) as info:
        load_spots(path)
    assert info.value.path == str(path)
    msg = str(info.value)
    assert "\n" not in msg and words in msg


def test_spot_file_not_json_or_missing(tmp_path):
    bad = tmp_path / "s.json"
    bad.write_text("spot,x,y\n1,2,3\n")
    with pytest.raises(SpotError, match="not valid JSON"):
        load_spots(bad)
    with pytest.raises(InputFormatError, match="not found"):
        load_spots(tmp_path / "missing.json")


def test_check_fits_names_the_spot_and_the_frame(tmp_path):
    ss = SpotSet((make_spot(1, "circle", (10, 10, 3)), make_spot(2, "circle", (62, 10, 3))))
    ss.check_fits((48, 70))
    with pytest.raises(SpotError, match=r"spot 2 .*64x48 frame") as info:
        ss.check_fits((48, 64), path=tmp_path / "x.json")
    assert info.value.path.endswith("x.json")


# ------------------------------------------------------------------ grid order


def test_row_major_order_on_a_tilted_jittered_grid():
    # Common practice: reading order is rows top to bottom, left to right in a row.
    pts = _grid(3, 4, 40.0, (50.0, 40.0), tilt_deg=5.0, jitter=1.0, seed=3)
    perm = np.random.default_rng(1).permutation(len(pts))
    shuffled = [pts[i] for i in perm]
    order, row = order_row_major([p[0] for p in shuffled], [p[1] for p in shuffled])
    assert [int(perm[i]) for i in order] == list(range(12))
    assert sorted(np.bincount(row).tolist()) == [4, 4, 4]


def test_row_major_order_edge_cases():
    assert order_row_major([], [])[0].size == 0
    assert order_row_major([5.0], [7.0])[0].tolist() == [0]


# ------------------------------------------------------------------ detection


@pytest.fixture(scope="module")
def card_projection():
    centres = _grid(3, 3, 40.0, (45.0, 30.0))
    amps = 0.01 * np.geomspace(1, 32, 9)
    img = _disc_image((140, 170), centres, 8.0, amps, noise=0.001, seed=2, background=0.02)
    return img, centres


@pytest.mark.parametrize("method", ["threshold", "log"])
def test_detect_spots_on_a_card(card_projection, method):
    img, centres = card_projection
    before = img.copy()
    ss = detect_spots(img, method=method)
    np.testing.assert_array_equal(img, before)  # input not modified
    assert len(ss) == 9 and ss.numbers == list(range(1, 10))
    got = np.array([(s.x_px, s.y_px) for s in ss])
    np.testing.assert_allclose(got, np.array(centres), atol=0.4)
    # Uniform aperture: 1.5 x the half-maximum radius (8 px for these discs).
    assert {s.radius_px for s in ss} == {ss[0].radius_px}
    assert ss[0].radius_px == pytest.approx(12.0, abs=0.6)


def test_detect_filters_area_and_circularity():
    # A bar (circularity 4 pi A / P^2 far below 0.6) and a 2-pixel speck are rejected.
    img = _disc_image((80, 100), [(30.0, 40.0)], 7.0, [0.2], noise=0.001, seed=4)
    img[60:64, 10:90] += 0.2
    img[10, 80:82] += 0.5
    ss = detect_spots(img)
    assert len(ss) == 1 and ss[0].x_px == pytest.approx(30.0, abs=0.3)
    assert len(detect_spots(img, min_circularity=0.0, min_area_px=1.0)) >= 2


def test_own_log_blobs_agree_with_skimage_blob_log(card_projection):
    # Reference library: skimage.feature.blob_log on the same background-subtracted
    # projection must find the same blobs (positions within 1 px, radius sqrt(2) sigma
    # within 25 %).
    from skimage.feature import blob_log

    img, centres = card_projection
    resid = img - background_surface(img)
    ours = log_blobs(resid, min_sigma=2.0, max_sigma=12.0, num_sigma=12, k_sigma=6.0)
    ref = blob_log(resid / resid.max(), min_sigma=2.0, max_sigma=12.0, num_sigma=12,
                   threshold=None, threshold_rel=0.02)
    # Same relative threshold on our (identically scale-normalised) responses.
    ours = ours[ours[:, 3] >= 0.02 * ours[:, 3].max()]
    assert len(ours) == len(ref) == 9
    for y, x, s in ref:
        d = np.hypot(ours[:, 0] - y, ours[:, 1] - x)
        j = int(np.argmin(d))
        assert d[j] <= 1.0
        assert ours[j, 2] == pytest.approx(s, rel=0.25)


def test_nothing_to_find_warns():
    rng = np.random.default_rng(0)
    with pytest.warns(NoSpotsWarning, match="looks dark"):
        ss = detect_spots(rng.normal(0, 1e-3, (60, 80)).astype(np.float32))
    assert len(ss) == 0 and ss.to_frame().columns.tolist()[:2] == ["spot", "shape"]
    with pytest.warns(NoSpotsWarning):
        detect_spots(np.zeros((40, 40), np.float32))


def test_spot_at_the_edge_is_dropped():
    img = _disc_image((60, 80), [(40.0, 30.0), (2.0, 30.0)], 6.0, [0.3, 0.3], noise=0.001)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ss = detect_spots(img)
    assert len(ss) == 1 and ss[0].x_px == pytest.approx(40.0, abs=0.3)


def test_background_surface_follows_a_corner_glow():
    yy, xx = np.mgrid[0:120, 0:160].astype(float)
    glow = 0.02 * np.exp(-((xx - 190) ** 2 + (yy - 140) ** 2) / (2 * 90.0**2))
    assert np.abs(background_surface(glow) - glow).max() < 0.05 * glow.max()


def test_isolated_pixels_finds_hot_pixels_not_spots():
    img = _disc_image((50, 50), [(25.0, 25.0)], 5.0, [0.5], noise=0.002, seed=1)
    img[5, 7] += 0.4
    img[40, 44] += 0.3
    hot = isolated_pixels(img)
    assert set(zip(*np.nonzero(hot))) == {(5, 7), (40, 44)}


# ------------------------------------------------------------------ projections, drift


def test_projection_accumulator_registers_shifted_frames():
    img = _disc_image((40, 50), [(25.0, 20.0)], 5.0, [1.0])
    acc = ProjectionAccumulator(img.shape)
    for sx, sy in [(0, 0), (3, -2), (-4, 1)]:
        moved = np.roll(img, (sy, sx), axis=(0, 1))  # content displaced by (sx, sy)
        acc.add(moved, (sx, sy))
    inner = (slice(5, 35), slice(6, 44))
    np.testing.assert_allclose(acc.max[inner], img[inner], atol=1e-6)
    np.testing.assert_allclose(acc.sum[inner], 3 * img[inner], rtol=1e-5, atol=1e-6)


def test_estimate_shift_sign_convention_matches_opencv_and_skimage():
    # CAMERA_NOTES section 3: b = np.roll(a, (3, 5), axis=(0, 1)) -> cv2.phaseCorrelate(a, b)
    # = (5, 3); skimage's phase_cross_correlation gives the opposite sign in (row, col).
    from skimage.registration import phase_cross_correlation

    rng = np.random.default_rng(5)
    a = cv2.GaussianBlur(rng.random((96, 128)).astype(np.float32), (0, 0), 2.0)
    b = np.roll(a, (3, 5), axis=(0, 1))
    a0, b0 = a.copy(), b.copy()
    win = cv2.createHanningWindow((128, 96), cv2.CV_32F)
    dx, dy, resp = estimate_shift(a, b, window=win)
    np.testing.assert_array_equal(a, a0)  # inputs not modified (cv2 would, in place)
    np.testing.assert_array_equal(b, b0)
    assert (dx, dy) == pytest.approx((5.0, 3.0), abs=0.05)
    assert resp > 0.5
    ref = phase_cross_correlation(a, b, upsample_factor=20)[0]
    assert (dx, dy) == pytest.approx((-ref[1], -ref[0]), abs=0.1)


@pytest.mark.parametrize("shift", [(0.3, -0.6), (1.25, 0.75), (-2.4, 1.9)])
def test_estimate_shift_sub_pixel(shift):
    # Sub-pixel test images from scipy.ndimage.shift (cubic spline); compared with the
    # known displacement and with skimage's upsampled cross-correlation.
    from scipy import ndimage
    from skimage.registration import phase_cross_correlation

    img = _disc_image((120, 160), _grid(3, 3, 35.0, (45.0, 25.0)), 7.0, [1.0] * 9, edge=1.0)
    moved = ndimage.shift(img, (shift[1], shift[0]), order=3, mode="nearest")
    win = cv2.createHanningWindow((160, 120), cv2.CV_32F)
    dx, dy, _ = estimate_shift(img, moved, window=win)
    assert (dx, dy) == pytest.approx(shift, abs=0.05)
    ref = phase_cross_correlation(img, moved, upsample_factor=50, normalization=None)[0]
    assert (dx, dy) == pytest.approx((-ref[1], -ref[0]), abs=0.06)


def _tremor_errors(spec, tracker):
    """Tracker shifts on the simulator's hand tremor (random walk of sub-pixel scene
    shifts, truth known) minus the truth, over the measured frames, after removing the
    median offset (shifts are relative to the first frame with structure); and how many
    frames were measured."""
    from ecl_quant.simulate import _plan, render_linear_frames

    drift = _plan(spec).drift
    est, ok = [], []
    for frame in render_linear_frames(spec):
        code = np.clip(np.rint(255 * np.sqrt(frame[..., 0])), 0, 255).astype(np.uint8)
        dx, dy, _, measured = tracker.update(code)
        est.append((dx, dy))
        ok.append(measured)
    est, ok = np.array(est), np.array(ok)
    off = est[ok] - drift[ok]
    return off - np.median(off, axis=0), int(ok.sum())


def test_drift_tracker_follows_a_simulated_tremor():
    # The simulator's hand tremor (random walk of sub-pixel scene shifts, truth known);
    # shifts are relative to the first frame with structure: compare after removing the
    # median offset.
    from ecl_quant.simulate import SimulationSpec

    spec = SimulationSpec(size=(160, 240), n_rows=2, n_cols=3, radius_px=8.0, spacing_px=40.0,
                          amplitudes=(0.05, 0.1, 0.15, 0.2, 0.25, 0.3), drift_px=4.0,
                          n_frames=40, onset_s=0.3, seed=9)
    err, n_ok = _tremor_errors(spec, DriftTracker(spec.size))
    assert n_ok >= 25
    assert np.sqrt(np.mean(err**2)) < 0.3
    assert np.abs(err).max() < 1.0


def _texture(shape, blur, seed):
    rng = np.random.default_rng(seed)
    return cv2.GaussianBlur(rng.random(shape).astype(np.float32), (0, 0), blur)


@pytest.mark.parametrize("shape", [(96, 128), (120, 160)])
@pytest.mark.parametrize("shift", [(0.0, 0.0), (5.0, 3.0), (-7.0, 2.0), (0.3, -0.6), (-2.4, 1.9)])
def test_phase_correlation_agrees_with_opencv(shape, shift):
    # Reference library: OpenCV's cv2.phaseCorrelate on the same mean-removed inputs and
    # window (even sizes, where its quadrant swap puts the zero lag exactly at the
    # centre). Unrefined estimate_shift is the same estimator: same peak within 0.01 px,
    # same response within 1e-3 (the drift tracker always uses a window).
    from scipy import ndimage

    h, w = shape
    a = _texture(shape, 2.0, 11)
    b = ndimage.shift(a, (shift[1], shift[0]), order=3, mode="wrap").astype(np.float32)
    b += np.random.default_rng(12).normal(0.0, 0.002, shape).astype(np.float32)
    win = cv2.createHanningWindow((w, h), cv2.CV_32F)
    dx, dy, resp = estimate_shift(a, b, window=win, refine_blur=None)
    (cx, cy), cresp = cv2.phaseCorrelate(a - a.mean(), b - b.mean(), win.copy())
    assert (dx, dy) == pytest.approx((cx, cy), abs=0.01)
    assert resp == pytest.approx(cresp, abs=1e-3)
    assert (dx, dy) == pytest.approx(shift, abs=0.6)  # the whole-pixel peak is right


@pytest.mark.parametrize("shift", [(0, 0), (0, 1), (2, -1), (-5, 3), (-1, -4)])
def test_estimate_shift_has_no_offset_on_odd_sizes(shift):
    # 135 x 240 is the downscaled size of a 1080p frame. Truth: two crops of one larger
    # image (discs on a fine texture) offset by whole pixels; cross-checked with
    # skimage's phase_cross_correlation (opposite sign convention, CAMERA_NOTES section 3).
    # cv2.phaseCorrelate in OpenCV 5.0 adds half a pixel on the odd axis.
    from skimage.registration import phase_cross_correlation

    pad = 8
    big = _disc_image((135 + 2 * pad, 240 + 2 * pad), _grid(3, 5, 45.0, (38.0, 30.0)), 9.0,
                      np.linspace(0.3, 1.0, 15), edge=1.0, noise=0.01, seed=21)
    big += 0.2 * _texture(big.shape, 1.0, 22)
    dx, dy = shift
    a = big[pad:pad + 135, pad:pad + 240]
    b = big[pad - dy:pad - dy + 135, pad - dx:pad - dx + 240]  # content moved by (dx, dy)
    win = cv2.createHanningWindow((240, 135), cv2.CV_32F)
    # Phase-correlation centroid: within 0.03 px of whole-pixel truth. The parabola
    # refinement (made for sub-pixel shifts) keeps within 0.1 px of it here.
    ref = phase_cross_correlation(a, b, upsample_factor=20)[0]
    for refine, tol in ((None, 0.03), (1.0, 0.1)):
        ex, ey, resp = estimate_shift(a, b, window=win, refine_blur=refine)
        assert (ex, ey) == pytest.approx((dx, dy), abs=tol)
        assert (ex, ey) == pytest.approx((-ref[1], -ref[0]), abs=tol)
        assert resp > 0.3


def _block_means(img, f):
    # Reference: numpy reshape + mean in float64 over f x f blocks from the top-left.
    h, w = img.shape[0] // f * f, img.shape[1] // f * f
    return img[:h, :w].astype(np.float64).reshape(h // f, f, w // f, f).mean(axis=(1, 3))


@pytest.mark.parametrize("factor", [1, 2, 3, 4, 6, 8, 12])
def test_downscale_for_drift_is_a_block_mean(factor):
    rng = np.random.default_rng(factor)
    img = rng.random((101, 146)).astype(np.float32)
    img0 = img.copy()
    small = downscale_for_drift(img, factor)
    np.testing.assert_array_equal(img, img0)
    assert small.dtype == np.float32 and small.flags.c_contiguous
    np.testing.assert_allclose(small, _block_means(img, factor), rtol=0, atol=2e-6)


@pytest.mark.parametrize("dtype, factor, n_rounded", [
    (np.uint8, 8, 2), (np.uint16, 8, 2), (np.uint8, 4, 1), (np.uint8, 2, 0), (np.uint8, 6, 0),
    (np.uint8, 16, 3)])
def test_downscale_for_drift_integer_planes(dtype, factor, n_rounded):
    # The 2 x 2 steps but the last round to whole codes (cv2.resize INTER_AREA, half up:
    # 1/8 code too high on average): one such step errs by at most 1/2 code, two by at
    # most 1 code, three by at most 1.5; the rest is exact.
    rng = np.random.default_rng(3)
    top = 255 if dtype == np.uint8 else 4095
    img = rng.integers(0, top + 1, (128, 176)).astype(dtype)
    err = downscale_for_drift(img, factor) - _block_means(img, factor)
    assert np.abs(err).max() <= 0.5 * n_rounded + 1e-4
    assert abs(err.mean() - 0.125 * n_rounded) < 0.05


def test_downscale_for_drift_channel_views_and_strided_planes():
    # A channel view of interleaved RGB data (as drift_plane returns for stills) and a
    # decoder plane with line padding give the same result as a contiguous copy.
    rng = np.random.default_rng(4)
    rgb = rng.integers(0, 256, (96, 160, 3)).astype(np.uint8)
    rgb0 = rgb.copy()
    for c in range(3):
        plane = drift_plane(type("F", (), {"data": rgb})(), ("red", "green", "blue")[c])
        assert plane.base is rgb
        np.testing.assert_array_equal(downscale_for_drift(plane, 8),
                                      downscale_for_drift(np.ascontiguousarray(rgb[..., c]), 8))
    np.testing.assert_array_equal(rgb, rgb0)
    grey = rgb[..., 0].copy()
    for view in (np.rot90(rgb)[..., 1], rgb[::-1][..., 0], grey[::-1], np.rot90(grey),
                 np.rot90(grey, 2), grey[:, ::-1]):  # rotated / flipped: copied first
        np.testing.assert_array_equal(downscale_for_drift(view, 4),
                                      downscale_for_drift(np.ascontiguousarray(view), 4))
    buf = rng.integers(0, 256, (96, 192)).astype(np.uint8)
    np.testing.assert_array_equal(downscale_for_drift(buf[:, :160], 8),
                                  downscale_for_drift(buf[:, :160].copy(), 8))
    np.testing.assert_allclose(downscale_for_drift(rgb[..., 2], 8), _block_means(rgb[..., 2], 8),
                               atol=1.0 + 1e-4)


def test_drift_tracker_odd_downscaled_size():
    # A 270 x 480 recording downscales by 2 to 135 x 240 (the size used for 1080p video):
    # simulated tremor with known truth (the project's simulator), compared after
    # removing the median offset as in the test above.
    from ecl_quant.simulate import SimulationSpec

    spec = SimulationSpec(size=(270, 480), n_rows=2, n_cols=4, radius_px=12.0, spacing_px=70.0,
                          amplitudes=(0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4), drift_px=6.0,
                          n_frames=40, onset_s=0.3, seed=5, shot_noise="gaussian")
    tracker = DriftTracker(spec.size)
    assert tracker.small_shape == (135, 240)
    err, n_ok = _tremor_errors(spec, tracker)
    assert n_ok >= 25
    assert np.sqrt(np.mean(err**2)) < 0.3
    assert np.abs(err).max() < 1.0


def test_resumed_tracker_keeps_the_first_pass_origin():
    # A second pass with resume() must report shifts in the first pass's origin: on the
    # simulator's tremor (truth known) a pass over every 5th frame from frame 20 (its
    # origin: the card at frame 20), then a resumed pass over all frames, agree with the
    # truth after one common offset taken from the first pass alone (a fresh tracker
    # would put the origin at frame 0 instead); the first tracker is left as it was.
    from ecl_quant.simulate import SimulationSpec, _plan, render_linear_frames

    spec = SimulationSpec(size=(160, 240), n_rows=2, n_cols=3, radius_px=8.0, spacing_px=40.0,
                          amplitudes=(0.05, 0.1, 0.15, 0.2, 0.25, 0.3), drift_px=4.0,
                          n_frames=40, onset_s=0.3, seed=9)
    drift = _plan(spec).drift
    codes = [np.clip(np.rint(255 * np.sqrt(f[..., 0])), 0, 255).astype(np.uint8)
             for f in render_linear_frames(spec)]
    sparse = DriftTracker(spec.size)
    first = {i: sparse.update(codes[i]) for i in range(20, 40, 5)}
    state = (sparse._last, sparse.n_measured)
    resumed = sparse.resume()
    second = [resumed.update(c) for c in codes]
    assert (sparse._last, sparse.n_measured) == state
    ok1 = [i for i, r in first.items() if r[3]]
    assert len(ok1) >= 3
    offset = np.median([np.subtract(first[i][:2], drift[i]) for i in ok1], axis=0)
    ok2 = [i for i, r in enumerate(second) if r[3]]
    assert len(ok2) >= 25
    err = np.array([np.subtract(second[i][:2], drift[i]) - offset for i in ok2])
    assert np.sqrt(np.mean(err**2)) < 0.3
    assert np.abs(err).max() < 1.0


# ------------------------------------------------------------------ drift kernels


def _kernels_or_skip():
    # The C kernels (ecl_quant/native/drift.c): built with the package (CI builds them),
    # so a missing or stale library fails here instead of skipping the C path silently.
    from ecl_quant import _jit
    from ecl_quant.spots import _drift_kernels

    if not _jit.enabled():
        pytest.skip("compiled kernels disabled (ECL_QUANT_JIT=0 in the environment)")
    assert _jit.native("drift") is not None, "build the C kernels: pip install -e ."
    k = _drift_kernels()
    assert k is not None
    return k


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_drift_kernel_halving_is_opencv_area_resize(dtype):
    # Reference: cv2.resize INTER_AREA of the float32 copy (2 x 2 means, exact for
    # integer codes): bit-identical, also on a row-padded view of a wider buffer.
    k = _kernels_or_skip()
    rng = np.random.default_rng(7)
    top = 255 if dtype == np.uint8 else 65535
    buf = rng.integers(0, top + 1, (90, 200)).astype(dtype)
    frozen = buf.copy()
    frozen.setflags(write=False)  # a read-only plane (decoded frames may be)
    for img in (buf, buf[:, :160], buf[:88, :6], frozen):
        h, w = img.shape[0] // 2, img.shape[1] // 2
        got = k.halve_to_float(img, np.empty((h, w), np.float32))
        ref = cv2.resize(img.astype(np.float32), (w, h), interpolation=cv2.INTER_AREA)
        np.testing.assert_array_equal(got, ref)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_drift_kernel_halves_one_channel_in_place_as_opencv(dtype):
    # Reference: cv2.resize INTER_AREA (2 x 2, rounded to whole codes) of the channel
    # cv2.extractChannel copies out: bit-identical, for each channel of an RGB image,
    # of a crop of it and of a read-only copy; and the tracker's downscale of an RGB
    # still's channel equals that of the copied-out plane.
    k = _kernels_or_skip()
    rng = np.random.default_rng(8)
    top = 255 if dtype == np.uint8 else 65535
    rgb = rng.integers(0, top + 1, (90, 122, 3)).astype(dtype)
    frozen = rgb.copy()
    frozen.setflags(write=False)
    for img in (rgb, rgb[3:, 5:117], frozen):  # (the crop has an odd row count)
        h, w = img.shape[0] // 2, img.shape[1] // 2
        for c in range(3):
            plane = cv2.extractChannel(np.ascontiguousarray(img[:2 * h, :2 * w]), c)
            ref = cv2.resize(plane, (w, h), interpolation=cv2.INTER_AREA)
            np.testing.assert_array_equal(k.halve_channel(img, c), ref)
    big = rng.integers(0, top + 1, (270, 480, 3)).astype(dtype)
    np.testing.assert_array_equal(downscale_for_drift(big[..., 1], 4),
                                  downscale_for_drift(np.ascontiguousarray(big[..., 1]), 4))


def test_drift_kernel_box_is_opencv_blur():
    # Reference: cv2.blur with a (1, k) kernel (vertical box, BORDER_REFLECT), twice;
    # the kernel's running sum in float64 agrees to float32 rounding.
    k = _kernels_or_skip()
    img = 100.0 * _texture((135, 240), 1.5, 8) + 20.0
    for r in (1, 6, 20):
        ref = img
        for _ in range(2):
            ref = cv2.blur(ref, (1, 2 * r + 1), borderType=cv2.BORDER_REFLECT)
        np.testing.assert_allclose(k.box_down_twice(img, r, 1.0), ref, rtol=0, atol=2e-5)


@pytest.mark.parametrize("shape, highpass_px", [((270, 480), 6.0), ((135, 240), 6.0),
                                                 ((40, 9), 3.0), ((12, 30), 8.0),
                                                 ((12, 30), 14.0)])
def test_highpass_kernels_match_the_opencv_code(monkeypatch, shape, highpass_px):
    # Reference: the OpenCV path (cv2.medianBlur, cv2.blur twice, cv2.meanStdDev), run
    # with ECL_QUANT_JIT=0. On (12, 30) a 29-px box is taller than the image (OpenCV
    # reflects more than once): the OpenCV path serves both there.
    from ecl_quant.spots import _highpass_moments

    _kernels_or_skip()
    img = 200.0 * _texture(shape, 1.0, 3) + np.linspace(0.0, 50.0, shape[1], dtype=np.float32)
    img0 = img.copy()
    got, mean, sd = _highpass_moments(img, highpass_px)
    monkeypatch.setenv("ECL_QUANT_JIT", "0")
    ref, ref_mean, ref_sd = _highpass_moments(img, highpass_px)
    np.testing.assert_array_equal(img, img0)
    m, s = cv2.meanStdDev(ref)
    assert (ref_mean, ref_sd) == (float(m[0, 0]), float(s[0, 0]))
    assert got.dtype == np.float32 and got.shape == img.shape
    np.testing.assert_allclose(got, ref, rtol=0, atol=5e-5)
    assert mean == pytest.approx(ref_mean, abs=1e-6)
    assert sd == pytest.approx(ref_sd, rel=1e-6)


def test_drift_kernel_wrappers_refuse_what_the_c_code_would_overrun():
    # common practice for a C extension: sizes and types are checked in Python, so a
    # wrong call raises instead of reading or writing outside the arrays.
    k = _kernels_or_skip()
    img = np.zeros((5, 40), np.float32)
    with pytest.raises(ValueError):
        k.box_down_twice(img, 5, 1.0)  # the 11-row box needs more than 5 rows
    with pytest.raises(ValueError):
        k.halve_to_float(np.zeros((5, 8), np.uint8), np.empty((3, 4), np.float32))
    with pytest.raises(TypeError):
        k.quarter_sums(np.zeros((8, 8), np.uint8), np.empty((2, 2), np.uint32))
    with pytest.raises(TypeError):
        k.highpass_rest(img, np.zeros((5, 41), np.float32), 1, np.zeros((0, 0), np.float32), 1.0)
    with pytest.raises(ValueError):
        k.cross_power(np.zeros((4, 6), np.float32), np.zeros((4, 8), np.float32), 1e-7)


def test_no_compiled_drift_kernels_with_jit_off(monkeypatch):
    # ECL_QUANT_JIT=0 turns the C kernels off (the OpenCV / numpy code runs); common
    # practice for an optional accelerator: one switch, checked at each use.
    from ecl_quant import _jit
    from ecl_quant.spots import _drift_kernels

    monkeypatch.setenv("ECL_QUANT_JIT", "0")
    assert _jit.native("drift") is None and _drift_kernels() is None
    monkeypatch.setenv("ECL_QUANT_JIT", "1")
    assert (_drift_kernels() is None) == (_jit.native("drift") is None)


def test_drift_tracker_same_shifts_with_and_without_kernels(monkeypatch):
    # The compiled path against the OpenCV / numpy one on the simulator's tremor at the
    # downscaled size of 1080p video (270 x 480 by 2): same shifts and flags.
    from ecl_quant.simulate import SimulationSpec, render_linear_frames

    _kernels_or_skip()
    spec = SimulationSpec(size=(270, 480), n_rows=2, n_cols=4, radius_px=12.0, spacing_px=70.0,
                          amplitudes=(0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4), drift_px=6.0,
                          n_frames=30, onset_s=0.3, seed=5, shot_noise="gaussian")
    codes = [np.clip(np.rint(255 * np.sqrt(f[..., 0])), 0, 255).astype(np.uint8)
             for f in render_linear_frames(spec)]
    runs = []
    for jit in ("1", "0"):
        monkeypatch.setenv("ECL_QUANT_JIT", jit)
        tracker = DriftTracker(spec.size, target_px=120)
        assert tracker.factor == 4
        runs.append(np.array([tracker.update(c) for c in codes]))
    fast, plain = runs
    assert plain[:, 3].sum() >= 15
    np.testing.assert_array_equal(fast[:, 3], plain[:, 3])
    np.testing.assert_allclose(fast[:, :2], plain[:, :2], rtol=0, atol=1e-3)
    np.testing.assert_allclose(fast[:, 2], plain[:, 2], rtol=0, atol=1e-5)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_drift_kernel_quarter_is_two_opencv_area_steps(dtype):
    # Reference: cv2.resize INTER_AREA 2 x 2 on the integer plane (rounded half up to a
    # whole code), then on its float32 copy (exact): bit-identical, through
    # downscale_for_drift too (factor 4 and 8) and on a row-padded view.
    k = _kernels_or_skip()
    rng = np.random.default_rng(8)
    top = 255 if dtype == np.uint8 else 65535
    buf = rng.integers(0, top + 1, (96, 200)).astype(dtype)
    buf[:8, :8] = top  # the largest sums
    acc = np.uint16 if dtype == np.uint8 else np.uint32
    for img in (buf, buf[:, :160]):
        h, w = img.shape
        half = cv2.resize(img, (w // 2, h // 2), interpolation=cv2.INTER_AREA)
        ref = cv2.resize(half.astype(np.float32), (w // 4, h // 4), interpolation=cv2.INTER_AREA)
        ow = w // 4
        got = k.quarter_sums(img, np.empty((h // 4, ow), acc))
        np.testing.assert_array_equal(got * np.float32(0.25), ref)
        np.testing.assert_array_equal(downscale_for_drift(img, 4), ref)
        ref8 = cv2.resize(cv2.resize(half, (w // 4, h // 4), interpolation=cv2.INTER_AREA)
                          .astype(np.float32), (w // 8, h // 8), interpolation=cv2.INTER_AREA)
        np.testing.assert_array_equal(downscale_for_drift(img, 8), ref8)


def test_drift_fft_shortcuts_are_scipy_fft():
    # Reference: scipy.fft.rfft2 / irfft2 (public functions; the inverse not divided by
    # the size, norm="forward"): the same numbers.
    from scipy import fft as sp_fft

    from ecl_quant.spots import _irfft2, _rfft2

    rng = np.random.default_rng(9)
    for shape in ((135, 240), (97, 128), (96, 131)):
        a = rng.random(shape).astype(np.float32)
        spec = _rfft2(a, shape)
        np.testing.assert_array_equal(spec, sp_fft.rfft2(a, s=shape))
        q = (spec * np.float32(0.5)).astype(np.complex64)
        np.testing.assert_array_equal(_irfft2(q, shape), sp_fft.irfft2(q, s=shape, norm="forward"))


def test_drift_kernel_cross_power_and_peak_box_are_the_numpy_code():
    # Reference: numpy's complex64 product with the conjugate, P |P| / (|P|^2 + eps), and
    # the 5 x 5 sums of np.roll-ed samples.
    k = _kernels_or_skip()
    rng = np.random.default_rng(10)
    a = (rng.normal(size=(60, 41)) + 1j * rng.normal(size=(60, 41))).astype(np.complex64) * 1e4
    b = (rng.normal(size=(60, 41)) + 1j * rng.normal(size=(60, 41))).astype(np.complex64) * 1e4
    b[3, 4] = 0  # a zero product: 0 / eps
    cross, norm = k.cross_power(a.view(np.float32), b.view(np.float32), 1.1920929e-07)
    ref = a * np.conj(b)
    mag = np.abs(ref)
    np.testing.assert_allclose(cross.view(np.complex64), ref, rtol=1e-6, atol=0)
    np.testing.assert_allclose(norm.view(np.complex64), ref * (mag / (mag * mag + 1.1920929e-07)),
                               rtol=0, atol=2e-6)
    assert norm.view(np.complex64)[3, 4] == 0
    # a count of values that is not a multiple of the vector width (7 x 5: 3 left over)
    a2, b2 = a[:7, :5].copy(), b[:7, :5].copy()
    cross2, norm2 = k.cross_power(a2.view(np.float32), b2.view(np.float32), 1.1920929e-07)
    ref2 = a2 * np.conj(b2)
    mag2 = np.abs(ref2)
    np.testing.assert_allclose(cross2.view(np.complex64), ref2, rtol=1e-6, atol=0)
    np.testing.assert_allclose(norm2.view(np.complex64),
                               ref2 * (mag2 / (mag2 * mag2 + 1.1920929e-07)), rtol=0, atol=2e-6)
    c = rng.random((20, 30)).astype(np.float32)
    for py, px in ((0, 0), (19, 29), (10, 1), (7, 15)):
        box = np.roll(c, (2 - py, 2 - px), axis=(0, 1))[:5, :5].astype(np.float64)
        d = np.arange(-2, 3)
        total, my, mx = k.peak_box(c, py, px)
        assert total == pytest.approx(box.sum(), rel=1e-12)
        assert my == pytest.approx(box.sum(axis=1) @ d, abs=1e-12)
        assert mx == pytest.approx(box.sum(axis=0) @ d, abs=1e-12)


@pytest.mark.parametrize("jit", ["1", "0"])
def test_spectral_lags_are_the_blurred_correlation(monkeypatch, jit):
    # Reference: the correlation of the two images, each blurred by cv2.GaussianBlur
    # (1 px), summed directly with numpy at the nine lags around a known shift; windowed
    # images (cv2.createHanningWindow, as the tracker), so that the border, where the
    # two sums differ, hardly counts. With ECL_QUANT_JIT=0 the numpy sums.
    from ecl_quant.spots import _rfft2, _spectral_lags

    monkeypatch.setenv("ECL_QUANT_JIT", jit)
    if jit == "1":
        _kernels_or_skip()
    from scipy import ndimage

    shape = (135, 240)
    win = cv2.createHanningWindow((240, 135), cv2.CV_32F)
    a = _texture(shape, 2.0, 13)
    b = ndimage.shift(a, (-2.3, 3.6), order=3, mode="wrap").astype(np.float32)
    a, b = (a - a.mean()) * win, (b - b.mean()) * win
    cross = _rfft2(b, shape) * np.conj(_rfft2(a, shape))
    got = _spectral_lags(cross, shape, 1.0, 4, -2)
    ab, bb = cv2.GaussianBlur(a, (0, 0), 1.0), cv2.GaussianBlur(b, (0, 0), 1.0)
    ref = np.empty((3, 3))
    for j in range(3):
        for i in range(3):
            lx, ly = 4 + i - 1, -2 + j - 1
            ref[j, i] = float(np.sum(ab.astype(np.float64) * np.roll(bb, (-ly, -lx), axis=(0, 1))))
    np.testing.assert_allclose(got, ref, rtol=2e-4)  # measured: 4e-5 (the border)
    # the curvatures the parabolas use agree too
    assert got[1, 0] - 2 * got[1, 1] + got[1, 2] == pytest.approx(
        ref[1, 0] - 2 * ref[1, 1] + ref[1, 2], rel=5e-4)
    assert got[0, 1] - 2 * got[1, 1] + got[2, 1] == pytest.approx(
        ref[0, 1] - 2 * ref[1, 1] + ref[2, 1], rel=5e-4)


def test_integer_sums_path_is_the_float_path(monkeypatch):
    # Reference: the OpenCV path (ECL_QUANT_JIT=0: downscale_for_drift in float32,
    # cv2.medianBlur, cv2.blur twice, cv2.meanStdDev, then mean removed and windowed as
    # _Prepared does). An 8-bit plane downscaled by 4 is kept as uint16 sums (4 x the
    # block means, exact) through the median.
    from ecl_quant.spots import _downscale_scaled, _highpass_moments

    _kernels_or_skip()
    rng = np.random.default_rng(12)
    plane = np.clip(rng.normal(60, 25, (480, 640)), 0, 255).astype(np.uint8)
    sums, scale = _downscale_scaled(plane, 4)
    assert sums.dtype == np.uint16 and scale == 0.25
    np.testing.assert_array_equal(sums * np.float32(0.25), downscale_for_drift(plane, 4))
    win = cv2.createHanningWindow((160, 120), cv2.CV_32F)
    got, mean, sd = _highpass_moments(sums, 6.0, window=win, scale=scale)
    monkeypatch.setenv("ECL_QUANT_JIT", "0")
    small = downscale_for_drift(plane, 4)
    ref, ref_mean, ref_sd = _highpass_moments(small, 6.0)
    np.testing.assert_allclose(got, (ref - np.float32(ref_mean)) * win, rtol=0, atol=5e-5)
    assert (mean, sd) == pytest.approx((ref_mean, ref_sd), rel=1e-6, abs=1e-6)


def test_nearer_match_makes_the_blurred_copies_when_asked():
    # Truth: a texture moved by whole pixels (np.roll: content displaced by (3, -2) px).
    # The blurred copies are made only for this search (the per-frame refinement works
    # on the spectra); a far phase-correlation peak gives way to the match within reach.
    tracker = DriftTracker((120, 160), target_px=160)
    assert tracker.factor == 1
    img = 200.0 * _texture((120, 160), 2.0, 5)
    tracker.update(img)
    assert tracker._ref._blurred is None
    moved = np.roll(img, (-2, 3), axis=(0, 1))
    prep, _ = tracker._prepared(moved)
    near = tracker._nearer_match(prep, 10.0, 10.0)
    assert near == pytest.approx((3.0, -2.0), abs=0.1)
    np.testing.assert_array_equal(tracker._ref.blurred,
                                  cv2.GaussianBlur(tracker._ref.windowed, (0, 0), 1.0))
    dx, dy, resp, measured = tracker.update(moved)
    assert measured and (dx, dy) == pytest.approx((3.0, -2.0), abs=0.1)
