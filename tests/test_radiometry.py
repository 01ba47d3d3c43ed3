"""Radiometry: channel values, Y'CbCr decoding, linearisation, darks, flats, exposure.

Each check names its outside source: ITU-R BT.601/BT.709 formulas (values from
shared/CAMERA_NOTES.md 1.4), IEC 61966-2-1, PyAV/FFmpeg swscale, LibRaw (rawpy), scipy and
numpy as reference libraries.
"""

from __future__ import annotations

import json
import math
from fractions import Fraction

import av
import cv2
import numpy as np
import pytest
import rawpy
import tifffile
from av.video.reformatter import Interpolation
from PIL import Image
from scipy import stats

from _media import write_dng, write_yuv_video
from ecl_quant.errors import InputFormatError, ShapeMismatchError
from ecl_quant.frames import Frame, open_recording
from ecl_quant.radiometry import (
    LinearSettings,
    MasterDark,
    apply_flat,
    channel_values,
    flat_field,
    hot_pixel_map,
    linear_values,
    linearize,
    load_dark,
    load_transfer_profile,
    master_dark,
    normalise_exposure,
    resolve_transfer,
    saturation_mask,
    transfer_choice,
)
from ecl_quant.transfer import TransferSpec

# ----------------------------------------------------------------------------- fixtures




def patch_planes(rng, n_patch=4, size=16):
    """Y', Cb, Cr planes made of uniform 16x16 patches (chroma uniform over each)."""
    ys = rng.integers(40, 200, (n_patch, n_patch))
    cbs = rng.integers(100, 156, (n_patch, n_patch))
    crs = rng.integers(100, 156, (n_patch, n_patch))
    y = np.kron(ys, np.ones((size, size))).astype(np.uint8)
    cb = np.kron(cbs, np.ones((size // 2, size // 2))).astype(np.uint8)
    cr = np.kron(crs, np.ones((size // 2, size // 2))).astype(np.uint8)
    return y, cb, cr




def still_frame(data, **kw):
    data = np.asarray(data)
    return Frame(index=0, time_s=0.0, data=data, max_code=float(np.iinfo(data.dtype).max),
                 source="mem", kind="still", bit_depth=8 * data.dtype.itemsize, **kw)


def ycbcr_reference(y, cb, cr, *, kr, kb, full, region):
    """ITU-R BT.601/709 inverse matrix on nearest-neighbour upsampled 4:2:0 chroma."""
    cb_up = np.repeat(np.repeat(cb.astype(np.float64), 2, 0), 2, 1)
    cr_up = np.repeat(np.repeat(cr.astype(np.float64), 2, 0), 2, 1)
    yy = y.astype(np.float64)
    if full:
        ey, ecb, ecr = yy / 255, (cb_up - 128) / 255, (cr_up - 128) / 255
    else:
        ey, ecb, ecr = (yy - 16) / 219, (cb_up - 128) / 224, (cr_up - 128) / 224
    r = ey + (2 - 2 * kr) * ecr
    b = ey + (2 - 2 * kb) * ecb
    g = (ey - kr * r - kb * b) / (1 - kr - kb)
    return {"luma": ey[region], "red": r[region], "green": g[region], "blue": b[region]}


# ----------------------------------------------------------------------------- transfer


def test_resolve_transfer_auto(tmp_path):
    # Defaults: 8-bit stills sRGB (IEC 61966-2-1, the Exif default colour space),
    # video BT.709 (ITU-R BT.709-6), 16-bit and raw linear (common practice).
    Image.fromarray(np.zeros((8, 8, 3), np.uint8)).save(tmp_path / "a.jpg")
    tifffile.imwrite(tmp_path / "b.tif", np.zeros((8, 8), np.uint16))
    write_dng(tmp_path / "c.dng", np.full((32, 48), 100, np.uint16))
    write_yuv_video(tmp_path / "d.mp4", [patch_planes(np.random.default_rng(0))])
    expected = {"a.jpg": "srgb", "b.tif": "linear", "c.dng": "linear", "d.mp4": "bt709"}
    for name, kind in expected.items():
        rec = open_recording(tmp_path / name)
        assert resolve_transfer("auto", rec).kind == kind
        fr = next(rec.frames())
        assert resolve_transfer("auto", fr).kind == kind
        choice = transfer_choice("auto", rec)
        assert choice["requested"] == "auto" and choice["resolved"] == kind and choice["reason"]
    # An explicit choice is kept.
    assert resolve_transfer("gamma=2.2", rec) == TransferSpec("gamma", gamma=2.2)


def test_auto_refuses_hdr_video():
    # HLG (ARIB STD-B67) is not BT.709: auto must not silently use the wrong curve.
    fr = Frame(index=0, time_s=0.0, data=np.zeros((4, 4), np.uint16), max_code=1023,
               source="hdr.mov", kind="video", bit_depth=10, transfer_tag="arib-std-b67")
    with pytest.raises(InputFormatError, match="HDR"):
        resolve_transfer("auto", fr)


@pytest.mark.parametrize(
    "spec, v, expected",
    [
        ("srgb", 188 / 255, 0.5028864580),  # IEC 61966-2-1 (CAMERA_NOTES 1.1 table)
        ("srgb", 10 / 255, 0.0030352698),  # linear segment, IEC 61966-2-1
        ("bt709", 0.5, 0.2595894005),  # inverse BT.709 OETF (CAMERA_NOTES 1.2)
        ("bt709", 0.05, 0.0111111111),  # 0.05 / 4.5, BT.709 linear segment
        ("gamma=2.2", 0.5, 0.5**2.2),  # pure power law, definition
        ("linear", 0.37, 0.37),
    ],
)
def test_linearize_published_values(spec, v, expected):
    out = linearize(np.array([[v]], np.float32), spec)
    assert out.dtype == np.float32
    assert float(out[0, 0]) == pytest.approx(expected, rel=2e-6, abs=1e-8)


def test_linearize_auto_is_an_error():
    with pytest.raises(InputFormatError, match="resolve"):
        linearize(np.zeros((2, 2), np.float32), "auto")


def _srgb_formula(v):
    # IEC 61966-2-1 decoding, written out independently.
    v = np.asarray(v, dtype=np.float64)
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def test_profile_lookup_table(tmp_path):
    # A profile holding the IEC 61966-2-1 curve sampled at the 256 8-bit codes must
    # reproduce sRGB exactly at the codes and within linear-interpolation error between.
    codes = np.arange(256) / 255
    table = _srgb_formula(codes)
    doc = {"schema": "ecl_quant.device_profile", "version": 1,
           "response": {"red": table.tolist(), "green": (table * 0.5).tolist(),
                        "blue": table.tolist(), "luma": table.tolist()},
           "device": {"make": "Tern", "model": "Cam1"}}
    path = tmp_path / "p.json"
    path.write_text(json.dumps(doc))
    prof = load_transfer_profile(path)
    np.testing.assert_allclose(prof(codes, "red"), table, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(prof(codes, "green"), 0.5 * table, rtol=1e-6, atol=1e-9)
    mid = (np.arange(255) + 0.5) / 255
    # Linear interpolation error <= h^2/8 max|f''| (numerical analysis bound, from memory);
    # for sRGB f'' <= 2.4 * 1.4 / 1.055^2 < 3.1, h = 1/255.
    assert np.max(np.abs(prof(mid, "red") - _srgb_formula(mid))) <= (1 / 255) ** 2 / 8 * 3.1
    spec = TransferSpec("profile", profile_path=str(path))
    np.testing.assert_allclose(linearize(codes.astype(np.float32), spec, channel="red"),
                               table, rtol=1e-5, atol=1e-7)
    # Beyond 1 (limited-range overshoot) the curve continues along its last segment.
    slope = (table[-1] - table[-2]) * 255
    assert float(prof(np.array([1.1]), "red")[0]) == pytest.approx(1 + 0.1 * slope, rel=1e-5)


@pytest.mark.parametrize(
    "doc, match",
    [
        ({"schema": "other", "version": 1, "response": {"red": [0, 1]}}, "not a device profile"),
        ({"schema": "ecl_quant.device_profile", "version": 2, "response": {"red": [0, 1]}},
         "version"),
        ({"schema": "ecl_quant.device_profile", "version": 1, "response": {"red": [0, 1, 0.5]}},
         "decreases"),
        ({"schema": "ecl_quant.device_profile", "version": 1, "response": {}}, "response"),
    ],
)
def test_profile_errors(tmp_path, doc, match):
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(InputFormatError, match=match):
        load_transfer_profile(path)


def test_profile_missing_and_not_json(tmp_path):
    with pytest.raises(InputFormatError, match="not found"):
        load_transfer_profile(tmp_path / "nope.json")
    (tmp_path / "x.json").write_text("{oops")
    with pytest.raises(InputFormatError, match="JSON"):
        load_transfer_profile(tmp_path / "x.json")


# ----------------------------------------------------------------------------- stills


def test_still_channels_and_luma():
    rng = np.random.default_rng(1)
    data = rng.integers(0, 256, (10, 12, 3), dtype=np.uint8)
    data.flags.writeable = False
    fr = still_frame(data)
    region = (slice(2, 7), slice(3, 11))
    for i, ch in enumerate(("red", "green", "blue")):
        v = channel_values(fr, ch, region=region)
        assert v.dtype == np.float32 and v.shape == (5, 8)
        np.testing.assert_allclose(v, data[2:7, 3:11, i] / 255, rtol=1e-6)
    # Rec. 709 luma of encoded R'G'B' (ITU-R BT.709-6 item 3.2).
    expected = (0.2126 * data[..., 0] + 0.7152 * data[..., 1] + 0.0722 * data[..., 2]) / 255
    np.testing.assert_allclose(channel_values(fr, "luma", region=region), expected[region],
                               rtol=1e-5)
    grey = still_frame(rng.integers(0, 65536, (6, 6)).astype(np.uint16))
    np.testing.assert_allclose(channel_values(grey, "red"), grey.data / 65535, rtol=1e-6)
    with pytest.raises(InputFormatError, match="raw"):
        channel_values(fr, "raw")
    with pytest.raises(InputFormatError, match="unknown channel"):
        channel_values(fr, "purple")
    with pytest.raises(ShapeMismatchError, match="step"):
        channel_values(fr, "red", region=(slice(0, 4, 2), slice(0, 4)))


def test_linear_values_and_settings():
    data = np.full((4, 4, 3), 188, np.uint8)
    fr = still_frame(data)
    # 8-bit still -> sRGB: code 188 -> 0.5028864580 (IEC 61966-2-1, CAMERA_NOTES 1.1).
    np.testing.assert_allclose(linear_values(fr, "red"), 0.5028864580, rtol=2e-6)
    s = LinearSettings(channel="blue", transfer="gamma=2.2")
    assert s.spec.gamma == 2.2 and s.to_dict()["transfer"] == "gamma=2.2"
    with pytest.raises(InputFormatError):
        LinearSettings(channel="purple")
    with pytest.raises(InputFormatError):
        LinearSettings(saturation_level=1.5)


def test_saturation_still_any_channel():
    # Saturation judged on encoded codes at or above level x maximum (EMVA 1288 6.6
    # counts pixels at the maximum value); any clipped colour channel counts (contract).
    data = np.zeros((1, 5, 3), np.uint8)
    data[0, 0] = (249, 0, 0)
    data[0, 1] = (250, 0, 0)  # 250 >= 0.98 * 255 = 249.9
    data[0, 2] = (0, 0, 255)  # blue clipped
    data[0, 3] = (0, 255, 0)
    fr = still_frame(data)
    np.testing.assert_array_equal(saturation_mask(fr, "red"), [[False, True, True, True, False]])
    np.testing.assert_array_equal(saturation_mask(fr, "red", level=1.0),
                                  [[False, False, True, True, False]])


# ----------------------------------------------------------------------------- video


@pytest.mark.parametrize(
    "colorspace, color_range, expected",
    [
        # CAMERA_NOTES 1.4 end-to-end table: Y=100, Cb=128, Cr=180 -> R'G'B' x 255.
        (1, 1, (191.0, 70.1, 97.8)),  # BT.709 limited
        (1, 2, (181.9, 75.7, 100.0)),  # BT.709 full
        (6, 1, (180.8, 55.5, 97.8)),  # BT.601 (SMPTE 170M) limited
        (None, None, (180.8, 55.5, 97.8)),  # untagged -> BT.601 (FFmpeg swscale)
    ],
)
def test_ycbcr_known_colour(tmp_path, colorspace, color_range, expected):
    h, w = 32, 48
    planes = (np.full((h, w), 100, np.uint8), np.full((h // 2, w // 2), 128, np.uint8),
              np.full((h // 2, w // 2), 180, np.uint8))
    path = tmp_path / "c.mp4"
    write_yuv_video(path, [planes], colorspace=colorspace, color_range=color_range,
                    options={"qp": "0"})
    fr = next(open_recording(path).frames())
    region = (slice(5, 9), slice(7, 12))
    got = [float(channel_values(fr, ch, region=region).mean()) * 255
           for ch in ("red", "green", "blue")]
    np.testing.assert_allclose(got, expected, atol=0.06)  # table printed to 0.1
    # PyAV's own rgb24 conversion (swscale) agrees within +-2 codes (CAMERA_NOTES 1.4).
    with av.open(str(path)) as c:
        rgb = next(c.decode(video=0)).to_ndarray(format="rgb24")
    np.testing.assert_allclose(got, rgb[region].reshape(-1, 3).mean(0), atol=2.0)


@pytest.mark.parametrize("colorspace, color_range, kr, kb, full", [
    (1, 1, 0.2126, 0.0722, False),  # ITU-R BT.709-6
    (1, 2, 0.2126, 0.0722, True),
    (5, 1, 0.299, 0.114, False),  # ITU-R BT.601-7 (BT.470BG tag)
])
def test_ycbcr_crop_formula_and_swscale(tmp_path, colorspace, color_range, kr, kb, full):
    rng = np.random.default_rng(2)
    y, cb, cr = patch_planes(rng)
    path = tmp_path / "p.mp4"
    write_yuv_video(path, [(y, cb, cr)], colorspace=colorspace, color_range=color_range,
                    options={"qp": "0"})
    fr = next(open_recording(path).frames())
    # Odd crop offsets test the nearest-neighbour chroma indexing.
    region = (slice(3, 45), slice(5, 60))
    ref = ycbcr_reference(y, cb, cr, kr=kr, kb=kb, full=full, region=region)
    # swscale's default rgb24 path truncates (measured here: up to 2.8 codes low, about
    # 1 code on average); with ACCURATE_RND and full chroma interpolation it rounds
    # (FFmpeg swscale flags, exposed by PyAV as Interpolation), so +-1 code applies.
    flags = Interpolation.BILINEAR | Interpolation.ACCURATE_RND | Interpolation.FULL_CHR_H_INT
    with av.open(str(path)) as c:
        rgb = next(c.decode(video=0)).to_ndarray(format="rgb24", interpolation=flags)
    rgb = rgb.astype(np.float64)
    interior = np.zeros((64, 64), bool)  # away from patch edges (swscale filters chroma)
    for i in range(4):
        for j in range(4):
            interior[16 * i + 3:16 * i + 13, 16 * j + 3:16 * j + 13] = True
    inner = interior[region]
    for ch_i, ch in enumerate(("red", "green", "blue")):
        v = channel_values(fr, ch, region=region)
        assert v.shape == (42, 55) and v.dtype == np.float32
        np.testing.assert_allclose(v, ref[ch], atol=2e-6)  # BT.601/709 formulas
        ours = np.clip(v * 255, 0, 255)
        assert np.max(np.abs(ours[inner] - rgb[region][..., ch_i][inner])) <= 1.0  # swscale
    np.testing.assert_allclose(channel_values(fr, "luma", region=region), ref["luma"],
                               atol=2e-6)


def test_ycbcr_bt601_against_opencv():
    # OpenCV's COLOR_YUV2RGB_I420 implements BT.601 limited range with rounding (OpenCV
    # imgproc docs, "YCrCb JPEG / YUV 4:2:0" conversions): +-1 code of ours everywhere,
    # since both upsample the chroma by nearest neighbour.
    rng = np.random.default_rng(15)
    y, cb, cr = patch_planes(rng)
    cb = cb + rng.integers(0, 3, cb.shape).astype(np.uint8)  # texture inside patches
    fr = Frame(index=0, time_s=0.0, data=y, max_code=255, source="m", kind="video",
               chroma=(cb, cr), chroma_step=(2, 2), yuv_matrix="bt601",
               yuv_range="limited")
    i420 = np.concatenate([y, cb.reshape(-1, 64), cr.reshape(-1, 64)])
    rgb = cv2.cvtColor(i420, cv2.COLOR_YUV2RGB_I420).astype(np.float64)
    for i, ch in enumerate(("red", "green", "blue")):
        ours = np.clip(channel_values(fr, ch) * 255, 0, 255)
        assert np.max(np.abs(ours - rgb[..., i])) <= 1.0


def test_limited_range_is_not_clipped():
    # Codes below 16 / above 235 give E'Y outside [0, 1] (CAMERA_NOTES 1.4: 0 -> -0.0730593607,
    # 255 -> 1.0913242009); they are kept for unbiased averaging.
    y = np.array([[0, 16, 235, 255]], np.uint8)
    fr = Frame(index=0, time_s=0.0, data=y, max_code=255, source="m", kind="video",
               chroma=(np.full((1, 2), 128, np.uint8), np.full((1, 2), 128, np.uint8)),
               chroma_step=(1, 2), yuv_matrix="bt709", yuv_range="limited")
    np.testing.assert_allclose(channel_values(fr, "luma")[0],
                               [-0.0730593607, 0.0, 1.0, 1.0913242009], atol=1e-7)
    # Neutral chroma: R' = G' = B' = Y' (matrix rows sum to one).
    np.testing.assert_allclose(channel_values(fr, "red"), channel_values(fr, "luma"), atol=1e-7)
    # Saturation: Y' >= 0.98 * 235 = 230.3 (limited-range peak).
    np.testing.assert_array_equal(saturation_mask(fr, "red"), [[False, False, True, True]])


@pytest.mark.parametrize("yuv_range", ["limited", "full"])
def test_saturation_floor_bounds_the_video_saturation_mask(yuv_range):
    # No pixel below the floor may be saturated in saturation_mask's sense (its R', G',
    # B' from the BT formulas, CAMERA_NOTES 1.4, or Y' at the peak), whatever the chroma
    # (including strongly coloured crops whose R' or B' saturates at moderate Y').
    from ecl_quant.radiometry import saturation_floor

    rng = np.random.default_rng(61)
    for trial in range(40):
        h, w = 24, 30
        y = rng.integers(100 if trial % 2 else 0, 256, (h, w), np.uint8)
        spread = int(rng.integers(1, 128))
        cb = rng.integers(128 - spread, 128 + spread, (h // 2, w // 2)).astype(np.uint8)
        cr = rng.integers(128 - spread, 128 + spread, (h // 2, w // 2)).astype(np.uint8)
        fr = Frame(index=0, time_s=0.0, data=y, max_code=255, source="m", kind="video",
                   chroma=(cb, cr), chroma_step=(2, 2), yuv_matrix="bt709",
                   yuv_range=yuv_range)
        region = (slice(2, 20), slice(3, 27))
        floor = saturation_floor(fr, region=region)
        mask = saturation_mask(fr, "red", region=region)
        assert floor is not None and 0 <= floor <= 255
        assert not mask[y[region] < floor].any()
        # ... and Y' at the peak code is saturated: the floor is not above it.
        peak = 235 if yuv_range == "limited" else 255
        assert floor <= math.ceil(0.98 * peak)
    still = Frame(index=0, time_s=0.0, data=np.zeros((4, 4, 3), np.uint8), max_code=255,
                  source="s", kind="still")
    assert saturation_floor(still) is None


def test_rotated_video_channel_values_match_pyav(tmp_path):
    # After rotation (np.rot90 of all planes) a crop must still match PyAV's rgb24 of the
    # unrotated frame, rotated the same way (CAMERA_NOTES 4).
    rng = np.random.default_rng(3)
    y, cb, cr = patch_planes(rng)
    path = tmp_path / "r.mp4"
    out = av.open(str(path), "w")
    s = out.add_stream("libx264", rate=30)
    s.width, s.height, s.pix_fmt, s.options = 64, 64, "yuv420p", {"qp": "0"}
    s.set_display_rotation(90)
    f = av.VideoFrame(64, 64, "yuv420p")
    for plane, arr in zip(f.planes, (y, cb, cr)):
        np.frombuffer(plane, np.uint8).reshape(plane.height, plane.line_size)[:, :plane.width] = arr
    f.pts = 0
    for pk in s.encode(f):
        out.mux(pk)
    for pk in s.encode():
        out.mux(pk)
    out.close()
    fr = next(open_recording(path).frames())
    ref = ycbcr_reference(y, cb, cr, kr=0.299, kb=0.114, full=False,
                          region=(slice(None), slice(None)))
    for ch in ("red", "green", "blue"):
        np.testing.assert_allclose(channel_values(fr, ch), np.rot90(ref[ch], 1), atol=2e-6)


# ----------------------------------------------------------------------------- raw


def test_raw_values_black_white(tmp_path):
    # Linear raw signal (raw - black[colour]) / (white - black) per photosite
    # (CAMERA_NOTES 5, rawpy docs); black per position from DNG BlackLevel.
    rng = np.random.default_rng(4)
    mosaic = (70 + rng.integers(0, 950, (32, 48))).astype(np.uint16)
    write_dng(tmp_path / "r.dng", mosaic, black=(64, 66, 68, 70), white=1023)
    fr = next(open_recording(tmp_path / "r.dng").frames())
    black = np.tile(np.array([[64, 66], [68, 70]], np.float64), (16, 24))
    expected = (mosaic - black) / (1023 - black)
    region = (slice(3, 20), slice(5, 30))
    np.testing.assert_allclose(channel_values(fr, "raw", region=region), expected[region],
                               rtol=1e-6)
    # Linear transfer is the identity: already linear.
    v = channel_values(fr, "raw")
    np.testing.assert_array_equal(linear_values(fr, "raw"), v)
    # Colour fill from the 2x2 cell, against a plain per-pixel reference loop.
    colours = {"red": (0,), "green": (1, 3), "blue": (2,)}
    cfa = fr.cfa
    for ch, idx in colours.items():
        got = channel_values(fr, ch, region=region)
        ref = np.empty(got.shape)
        for a, yy in enumerate(range(3, 20)):
            for b, xx in enumerate(range(5, 30)):
                if cfa[yy, xx] in idx:
                    ref[a, b] = expected[yy, xx]
                else:
                    y0, x0 = yy - yy % 2, xx - xx % 2
                    vals = [expected[y0 + i, x0 + j] for i in (0, 1) for j in (0, 1)
                            if cfa[y0 + i, x0 + j] in idx]
                    ref[a, b] = np.mean(vals)
        np.testing.assert_allclose(got, ref, rtol=1e-6)
    with pytest.raises(InputFormatError, match="luma"):
        channel_values(fr, "luma")


def test_raw_cells_against_libraw_half_size(tmp_path):
    # LibRaw's half-size output takes R and B of each 2x2 cell and the mean of its two
    # greens, scaled by 65535 / (white - black) with white balance 1 (rawpy docs,
    # postprocess(half_size=True)); it must agree with our cell fill.
    rng = np.random.default_rng(5)
    mosaic = (64 + rng.integers(0, 959, (32, 48))).astype(np.uint16)
    write_dng(tmp_path / "h.dng", mosaic)
    fr = next(open_recording(tmp_path / "h.dng").frames())
    with rawpy.imread(str(tmp_path / "h.dng")) as raw:
        half = raw.postprocess(half_size=True, output_color=rawpy.ColorSpace.raw,
                               gamma=(1, 1), no_auto_bright=True, output_bps=16,
                               user_wb=[1, 1, 1, 1], adjust_maximum_thr=0, user_flip=0)
    for i, ch in enumerate(("red", "green", "blue")):
        # Odd photosite of each cell (1, 1) is blue; it carries the cell's red/green.
        ours = channel_values(fr, ch)[1::2, 1::2]
        np.testing.assert_allclose(ours * 65535, half[..., i], atol=2.0)


def test_raw_saturation(tmp_path):
    mosaic = np.full((32, 48), 200, np.uint16)
    mosaic[4, 4] = 1023  # a red photosite (RGGB, even row and column) at white
    write_dng(tmp_path / "s.dng", mosaic)
    fr = next(open_recording(tmp_path / "s.dng").frames())
    raw_mask = saturation_mask(fr, "raw")
    assert raw_mask.sum() == 1 and raw_mask[4, 4]
    red_mask = saturation_mask(fr, "red")
    assert red_mask.sum() == 4 and red_mask[4:6, 4:6].all()  # the whole cell uses it
    assert saturation_mask(fr, "blue").sum() == 0


# ----------------------------------------------------------------------------- darks


def _dark_stack(rng, n=15, shape=(20, 24), offset=0.05, sigma=0.004):
    return [offset + rng.normal(0, sigma, shape).astype(np.float32) for _ in range(n)]


def test_master_dark_median_removes_offset():
    rng = np.random.default_rng(6)
    darks = _dark_stack(rng)
    copies = [d.copy() for d in darks]
    md = master_dark(iter(darks), method="median")
    assert isinstance(md, MasterDark) and md.n_frames == 15 and md.method == "median"
    stack = np.stack(darks)
    np.testing.assert_array_equal(md.level, np.median(stack, axis=0))  # numpy reference
    np.testing.assert_allclose(md.variance, np.var(stack, axis=0, ddof=1), rtol=1e-5)
    # A fresh frame at the same offset averages to zero after subtraction; SE of the mean
    # of 480 pixels of (noise - master) is about sigma*sqrt(1 + pi/2/n)/sqrt(480).
    fresh = 0.05 + rng.normal(0, 0.004, (20, 24))
    residual = fresh - md.level
    assert abs(residual.mean()) < 4 * 0.004 * math.sqrt(1 + math.pi / 30) / math.sqrt(480)
    np.testing.assert_allclose(md.level_variance, math.pi / 2 * md.variance / 15, rtol=1e-6)
    for a, b in zip(darks, copies):  # inputs untouched (STYLE rule 1)
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("method", ["median", "sigma_clip"])
def test_master_dark_memory_bound_matches_in_memory(method):
    # A tiny budget forces the spill-to-disk path and row blocks: same answer.
    rng = np.random.default_rng(7)
    darks = _dark_stack(rng, n=9, shape=(33, 17))
    big = master_dark(darks, method=method)
    small = master_dark(iter(darks), method=method, memory_bytes=4096)
    np.testing.assert_array_equal(big.level, small.level)
    np.testing.assert_array_equal(big.variance, small.variance)


def test_sigma_clip_matches_scipy():
    # scipy.stats.sigmaclip (reference library): iterative clipping around the mean at
    # +-3 std until nothing changes; our per-pixel mean and variance of the kept values
    # must equal it pixel by pixel, with cosmic-ray outliers planted.
    rng = np.random.default_rng(8)
    darks = _dark_stack(rng, n=25, shape=(6, 7))
    for k in range(12):
        darks[rng.integers(25)][rng.integers(6), rng.integers(7)] += 0.5
    md = master_dark(darks, method="sigma_clip", sigma=3.0)
    stack = np.stack(darks).astype(np.float64)
    for i in range(6):
        for j in range(7):
            kept = stats.sigmaclip(stack[:, i, j], 3.0, 3.0).clipped
            assert md.level[i, j] == pytest.approx(kept.mean(), rel=1e-6)
            assert md.variance[i, j] == pytest.approx(kept.var(ddof=1), rel=1e-5)
            assert md.level_variance[i, j] == pytest.approx(kept.var(ddof=1) / kept.size,
                                                            rel=1e-5)
    # The outliers are gone: the clipped level is close to the offset everywhere.
    assert np.max(np.abs(md.level - 0.05)) < 0.004


def test_master_dark_errors():
    with pytest.raises(InputFormatError, match="no dark frames"):
        master_dark([])
    with pytest.raises(ShapeMismatchError, match="dark frame 1"):
        master_dark([np.zeros((4, 4)), np.zeros((4, 5))])
    with pytest.raises(InputFormatError, match="method"):
        master_dark([np.zeros((4, 4))], method="mean")


def test_hot_pixels_found_exactly():
    rng = np.random.default_rng(9)
    level = 0.02 + rng.normal(0, 0.001, (40, 50))
    planted = {(3, 4), (10, 30), (25, 7), (39, 49)}
    for yx in planted:
        level[yx] += 0.05  # 50 sigma
    hot = hot_pixel_map(level, k=8.0)
    assert {tuple(p) for p in np.argwhere(hot)} == planted
    # Threshold = median + k x MAD scaled to sigma: scipy.stats.median_abs_deviation
    # (scale="normal") as the reference.
    for k in (2.0, 3.0):
        thr = np.median(level) + k * stats.median_abs_deviation(level, axis=None,
                                                                 scale="normal")
        np.testing.assert_array_equal(hot_pixel_map(level, k=k), level > thr)


def test_hot_pixels_from_temporal_noise():
    # A flickering (random telegraph) pixel has a normal mean but a large temporal std.
    rng = np.random.default_rng(10)
    darks = _dark_stack(rng, n=20, shape=(16, 16), sigma=0.002)
    for i, d in enumerate(darks):
        d[5, 6] += 0.03 if i % 2 else -0.03
    md = master_dark(darks)
    assert not hot_pixel_map(md, use="level")[5, 6]
    std_hot = hot_pixel_map(md, use="std")
    assert {tuple(p) for p in np.argwhere(std_hot)} == {(5, 6)}
    with pytest.raises(InputFormatError, match="2 dark frames"):
        hot_pixel_map(master_dark([darks[0]]), use="std")


def test_load_dark_folder_and_size_message(tmp_path):
    rng = np.random.default_rng(11)
    folder = tmp_path / "darks"
    folder.mkdir()
    codes = [rng.integers(900, 1100, (48, 64)).astype(np.uint16) for _ in range(5)]
    for i, c in enumerate(codes):
        tifffile.imwrite(folder / f"d{i}.tif", c)
    md = load_dark(folder, channel="red", transfer="auto", shape=(48, 64))
    # 16-bit TIFF -> linear: the level is the median of code / 65535 (numpy reference).
    np.testing.assert_allclose(md.level, np.median(np.stack(codes) / 65535, axis=0), rtol=1e-6)
    assert md.provenance["transfer"]["resolved"] == "linear"
    assert md.n_frames == 5
    with pytest.raises(ShapeMismatchError) as info:
        load_dark(folder, channel="red", transfer="auto", shape=(60, 80))
    assert info.value.reason == ("dark frame is 64x48 but the recording is 80x60; record "
                                 "darks at the same resolution")
    assert info.value.path == str(folder)


def test_load_dark_from_video(tmp_path):
    rng = np.random.default_rng(12)
    planes = [(np.full((32, 32), 20, np.uint8) + rng.integers(0, 3, (32, 32), dtype=np.uint8),
               np.full((16, 16), 128, np.uint8), np.full((16, 16), 128, np.uint8))
              for _ in range(6)]
    path = tmp_path / "dark.mp4"
    write_yuv_video(path, planes, options={"qp": "0"})
    md = load_dark(path, channel="luma", transfer="linear", shape=(32, 32))
    ys = np.stack([p[0] for p in planes]).astype(np.float64)
    np.testing.assert_allclose(md.level, np.median((ys - 16) / 219, axis=0), atol=1e-6)
    assert md.provenance["kind"] == "video"


# ----------------------------------------------------------------------------- flat, exposure


def test_flat_field_recovers_vignetting():
    # Flat-field correction (common practice, as in CCD reduction): flat = mean(flat -
    # dark) normalised; dividing a flat-lit frame by it leaves a uniform image.
    yy, xx = np.mgrid[0:30, 0:40]
    vignette = 1 - 0.3 * (((yy - 15) / 15) ** 2 + ((xx - 20) / 20) ** 2) / 2
    rng = np.random.default_rng(13)
    dark = np.full((30, 40), 0.01)
    flats = [0.5 * vignette + dark + rng.normal(0, 0.001, (30, 40)) for _ in range(20)]
    flat = flat_field(flats, dark=dark)
    assert flat.dtype == np.float32
    np.testing.assert_allclose(flat, vignette / np.median(vignette), atol=0.002)
    scene = 0.2 * vignette
    region = (slice(2, 12), slice(5, 25))
    corrected = apply_flat(scene[region], flat, region=region)
    assert corrected.std() / corrected.mean() < 0.005
    with pytest.raises(ShapeMismatchError):
        apply_flat(np.ones((3, 3)), flat)
    assert np.isnan(apply_flat(np.ones((1, 2)), np.array([[1.0, 0.0]]))[0, 1])


def test_normalise_exposure():
    # Signal per second: a scene at 1/30 s and at 1/15 s (twice the light) agree
    # (DOMAIN: exposure normalisation; linear sensor model, EMVA 1288 eq. 6).
    rate = np.array([[0.6, 1.2]], np.float32)
    a = normalise_exposure(rate * (1 / 30), 1 / 30)
    b = normalise_exposure(rate * (1 / 15), 1 / 15)
    np.testing.assert_allclose(a, b, rtol=1e-6)
    np.testing.assert_allclose(a, rate, rtol=1e-6)
    # ISO: a recording at ISO 200 reads twice as high; scaled to reference ISO 100.
    c = normalise_exposure(2 * rate * (1 / 30), 1 / 30, iso=200, reference_iso=100)
    np.testing.assert_allclose(c, rate, rtol=1e-6)
    kept = normalise_exposure(rate, None)
    np.testing.assert_array_equal(kept, rate)
    assert kept is not rate
    with pytest.raises(InputFormatError, match="positive"):
        normalise_exposure(rate, 0.0)


def test_vfr_video_channel_time_consistency(tmp_path):
    # Frames of a VFR video keep their pts times while channel values come from each
    # frame's own planes (PyAV frame.time, CAMERA_NOTES 4).
    rng = np.random.default_rng(14)
    frames = [patch_planes(rng) for _ in range(3)]
    path = tmp_path / "v.mp4"
    write_yuv_video(path, frames, pts=[0, 25, 90], time_base=Fraction(1, 600),
                    options={"qp": "0"})
    got = list(open_recording(path).frames())
    assert [f.time_s for f in got] == pytest.approx([0, 25 / 600, 90 / 600])
    for f, (y, _, _) in zip(got, frames):
        np.testing.assert_allclose(channel_values(f, "luma"), (y - 16.0) / 219, atol=1e-6)


def test_ten_bit_limited_range_scaling():
    # n-bit limited range: E'Y = (Y - 16*2^(n-8)) / (219*2^(n-8)), E'C = (C - 128*2^(n-8)) /
    # (224*2^(n-8)) (ITU-R BT.709-6 / BT.2020-2; CAMERA_NOTES 1.3: 10-bit V = (D - 64)/876).
    y = np.array([[64, 502, 940, 1019]], np.uint16)
    cb = np.full((1, 2), 512, np.uint16)
    cr = np.array([[512, 960]], np.uint16)
    fr = Frame(index=0, time_s=0.0, data=y, max_code=1023, source="m", kind="video",
               chroma=(cb, cr), chroma_step=(1, 2), yuv_matrix="bt2020",
               yuv_range="limited", bit_depth=10)
    np.testing.assert_allclose(channel_values(fr, "luma")[0],
                               [0.0, 438 / 876, 1.0, 955 / 876], atol=1e-7)
    # BT.2020 Kr = 0.2627: R' = Y' + (2 - 2 Kr) E'Cr, with E'Cr = 448/896 = 0.5.
    red = channel_values(fr, "red")[0]
    np.testing.assert_allclose(red[:2], [0.0, 438 / 876], atol=1e-7)
    np.testing.assert_allclose(red[2:], [1.0 + (2 - 2 * 0.2627) * 0.5,
                                         955 / 876 + (2 - 2 * 0.2627) * 0.5], atol=1e-6)


@pytest.mark.parametrize("step,shape", [((2, 2), (37, 51)), ((1, 2), (20, 33)), ((1, 1), (9, 14))])
@pytest.mark.parametrize("channel", ["luma", "red", "blue"])
def test_coded_crop_values_equal_the_formulas(step, shape, channel):
    # code_values (one table lookup per pixel) must give exactly linearize(channel_values)
    # (the BT formulas of CAMERA_NOTES 1.4 and the BT.709 EOTF), for odd frame sizes and
    # crops starting on odd rows/columns where the chroma is shared unevenly.
    from ecl_quant.radiometry import code_values

    rng = np.random.default_rng(51)
    h, w = shape
    y = rng.integers(0, 256, (h, w), np.uint8)
    ch, cw = -(-h // step[0]), -(-w // step[1])
    cb = rng.integers(0, 256, (ch, cw), np.uint8)
    cr = rng.integers(0, 256, (ch, cw), np.uint8)
    fr = Frame(index=0, time_s=0.0, data=y, max_code=255, source="m", kind="video",
               chroma=(cb, cr), chroma_step=step, yuv_matrix="bt709", yuv_range="limited")
    for region in [None, (slice(1, h - 2), slice(3, w)), (slice(h - 5, h), slice(w - 4, w))]:
        # The chroma of pixel (y, x) is plane[min(y // sy, H - 1), min(x // sx, W - 1)]
        # (nearest neighbour, as FFmpeg's point scaler; common practice), by plain indexing.
        from ecl_quant.radiometry import _upsample_chroma

        rr = region or (slice(0, h), slice(0, w))
        rows = np.minimum(np.arange(h)[rr[0]] // step[0], ch - 1)
        cols = np.minimum(np.arange(w)[rr[1]] // step[1], cw - 1)
        r0, c0 = rr[0].start or 0, rr[1].start or 0
        bounds = (r0, r0 + rows.size, c0, c0 + cols.size)
        np.testing.assert_array_equal(_upsample_chroma(cr, step, bounds), cr[rows][:, cols])
        coded = code_values(fr, channel, "bt709", region=region)
        expected = linearize(channel_values(fr, channel, region=region), TransferSpec("bt709"),
                             channel=channel)
        np.testing.assert_array_equal(coded.values(), expected)
        # Ranks order the values (equal values share a rank).
        v = coded.table.astype(np.float64)
        np.testing.assert_array_equal(coded.rank_value[coded.rank], v)
        assert np.all(np.diff(coded.rank_value) > 0)
        # Lazy: the same codes from the planes, whole or at a few pixels.
        lazy = code_values(fr, channel, "bt709", region=region, lazy=True)
        assert lazy.source is not None and lazy.shape == coded.codes.shape
        flat = rng.integers(0, coded.codes.size, 40)
        np.testing.assert_array_equal(lazy.codes_at(flat), coded.codes.reshape(-1)[flat])
        # values() before the crop of codes exists: the compiled gather of every pixel
        # (when built), then from the codes
        np.testing.assert_array_equal(lazy.values(), expected)
        np.testing.assert_array_equal(lazy.codes, coded.codes)
        np.testing.assert_array_equal(lazy.values(), expected)


@pytest.mark.parametrize("rotation", [0, 1, 3])
@pytest.mark.parametrize("channel", ["luma", "red"])
def test_compiled_plane_gather_equals_the_formulas(rotation, channel):
    # The kernel reads codes straight from the decoded planes (nearest chroma by lookup
    # tables); its values must be linearize(channel_values) at those pixels (the BT
    # formulas, CAMERA_NOTES 1.4), also for rotated (negative-stride) planes and crops
    # reaching the last, unevenly shared chroma row and column.
    from ecl_quant import _jit
    from ecl_quant.radiometry import code_values

    if not _jit.enabled():
        pytest.skip("compiled kernels disabled (ECL_QUANT_JIT=0 in the environment)")
    kernels = _jit.kernels()
    assert kernels is not None, "build the C kernels: pip install -e ."
    rng = np.random.default_rng(53 + rotation)
    y = rng.integers(0, 256, (37, 51), np.uint8)
    cb = rng.integers(0, 256, (19, 26), np.uint8)
    cr = rng.integers(0, 256, (19, 26), np.uint8)
    y, cb, cr = (np.rot90(a, rotation) for a in (y, cb, cr))
    fr = Frame(index=0, time_s=0.0, data=y, max_code=255, source="m", kind="video",
               chroma=(cb, cr), chroma_step=(2, 2), yuv_matrix="bt709", yuv_range="limited")
    h, w = y.shape
    region = (slice(3, h), slice(1, w))
    lazy = code_values(fr, channel, "bt709", region=region, lazy=True)
    src = lazy.source
    expected = linearize(channel_values(fr, channel, region=region), TransferSpec("bt709"),
                         channel=channel)
    ch, cw = expected.shape
    # Random pixels (runs of one) and whole rows of the crop (runs to its last column),
    # read with a shift of the runs by (dy, dx) = (-1, 1).
    dy, dx = -1, 1
    flat = np.concatenate([rng.integers(0, (ch - 1) * (cw - 1), 300),
                           np.arange(5 * cw, 7 * cw)])
    rows, cols = np.divmod(flat, cw)
    keep = (rows + dy >= 0) & (cols + dx < cw)
    rows, cols = rows[keep], cols[keep]
    runs = _jit.as_runs(rows * cw + cols, cw)
    assert runs.shape[0] < rows.size  # the whole rows became runs
    vals = np.empty(rows.size, np.float32)
    keys = np.empty(rows.size, np.int32)
    kernels.gather_planes(src.luma, src.chroma, src.bounds[0], src.bounds[2], 1, 1, runs,
                          dy, dx, lazy.table, vals, keys)
    np.testing.assert_array_equal(vals, expected[rows + dy, cols + dx])


def test_coded_crop_of_stills_and_none_where_no_table():
    from ecl_quant.radiometry import code_values

    rng = np.random.default_rng(52)
    for dtype in (np.uint8, np.uint16):
        rgb = rng.integers(0, np.iinfo(dtype).max, (12, 10, 3), dtype)
        fr = Frame(index=0, time_s=0.0, data=rgb, max_code=float(np.iinfo(dtype).max),
                   source="s", kind="still", bit_depth=8 * np.dtype(dtype).itemsize)
        for channel in ("red", "green", "blue"):
            coded = code_values(fr, channel, "srgb", region=(slice(2, 9), slice(1, 7)))
            expected = linearize(channel_values(fr, channel, region=(slice(2, 9), slice(1, 7))),
                                 TransferSpec("srgb"), channel=channel)
            np.testing.assert_array_equal(coded.values(), expected)
            # Lazy: the channel read in place from the interleaved image.
            lazy = code_values(fr, channel, "srgb", region=(slice(2, 9), slice(1, 7)),
                               lazy=True)
            assert lazy.source is not None and lazy.shape == (7, 6)
            np.testing.assert_array_equal(lazy.codes_at(np.arange(0, 42, 5)),
                                          coded.codes.reshape(-1)[::5])
            np.testing.assert_array_equal(lazy.values(), expected)
    fr = Frame(index=0, time_s=0.0, data=rgb.astype(np.float32), max_code=1.0, source="s",
               kind="still", bit_depth=32)
    assert code_values(fr, "red", "srgb") is None
