"""Frame sources: stills, video, raw DNG, EXIF, errors, streaming.

Fixtures are written with outside reference writers (Pillow, OpenCV, tifffile, PyAV) and
read back through ecl_quant.frames; each check names the source of its expected value.
"""

from __future__ import annotations

import gc
import inspect
import os
import struct
import tracemalloc
import weakref
import zlib
from fractions import Fraction
from pathlib import Path

import av
import cv2
import numpy as np
import pytest
import rawpy
import tifffile
from PIL import ExifTags, Image, ImageOps, TiffImagePlugin

from _media import write_dng, write_yuv_video
from ecl_quant.errors import InputFormatError, ShapeMismatchError, TimingWarning
from ecl_quant.frames import (
    DEFAULT_MAX_PIXELS,
    _video_planes,
    iter_frames,
    natural_key,
    open_recording,
    read_exif,
)

# ----------------------------------------------------------------------------- helpers




def random_planes(rng, h, w, n, sub=(2, 2)):
    return [
        (
            rng.integers(16, 236, (h, w), dtype=np.uint8),
            rng.integers(16, 241, (h // sub[0], w // sub[1]), dtype=np.uint8),
            rng.integers(16, 241, (h // sub[0], w // sub[1]), dtype=np.uint8),
        )
        for _ in range(n)
    ]


def pyav_raw_planes(path):
    """Decode with bare PyAV: unrotated (Y, Cb, Cr) copies and frame.time per frame."""
    out = []
    with av.open(str(path)) as c:
        for fr in c.decode(video=0):
            arr = [np.frombuffer(p, np.uint8).reshape(p.height, p.line_size)[:, : p.width].copy()
                   for p in fr.planes]
            out.append((arr, fr.time, fr.rotation))
    return out


def save_jpeg_with_exif(path, arr, *, exposure=None, iso=None, when=None, subsec=None,
                        orientation=None, quality=95):
    """Pillow as the reference EXIF writer (tags in the Exif sub-IFD, CAMERA_NOTES 5)."""
    exif = Image.Exif()
    if orientation is not None:
        exif[ExifTags.Base.Orientation] = orientation
    sub = exif.get_ifd(ExifTags.IFD.Exif)
    if exposure is not None:
        sub[ExifTags.Base.ExposureTime] = TiffImagePlugin.IFDRational(*exposure)
    if iso is not None:
        sub[ExifTags.Base.ISOSpeedRatings] = iso
    if when is not None:
        sub[ExifTags.Base.DateTimeOriginal] = when
    if subsec is not None:
        sub[ExifTags.Base.SubsecTimeOriginal] = subsec
    Image.fromarray(arr).save(path, exif=exif, quality=quality)




def png_header_only(path, width, height):
    """A PNG whose IHDR claims width x height but holds almost no data (a 'bomb')."""
    def chunk(kind, data):
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 16)
    Path(path).write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", idat)
                           + chunk(b"IEND", b""))


# ----------------------------------------------------------------------------- video


def test_vfr_times_follow_pts(tmp_path):
    # Phones write pts in a 1/600 s time base (CAMERA_NOTES 4, ffprobe example); the
    # PyAV docs define frame.time = pts * time_base. Irregular gaps: index/fps is wrong.
    pts = [0, 20, 40, 70, 90, 130, 150, 160, 200, 260, 280, 300]
    path = tmp_path / "vfr.mp4"
    write_yuv_video(path, random_planes(np.random.default_rng(1), 48, 64, len(pts)),
                    pts=pts, time_base=Fraction(1, 600))
    rec = open_recording(path)
    times = [f.time_s for f in rec.frames()]
    expected = [p / 600 for p in pts]
    half_interval = min(np.diff(expected)) / 2
    assert len(times) == len(expected)
    assert np.max(np.abs(np.asarray(times) - expected)) < half_interval
    # Exact here: the muxer keeps the pts (rescaled), CAMERA_NOTES 4.
    np.testing.assert_allclose(times, expected, atol=1e-9)
    # The average rate would mistime frames: that is why pts are used (CAMERA_NOTES 4).
    avg = rec.metadata["average_rate"]
    assert np.max(np.abs(np.arange(len(pts)) / avg - expected)) > half_interval
    assert rec.metadata["time_source"] == "pts"
    assert rec.metadata["codec"] == "h264"
    assert rec.n_frames == len(pts)
    assert rec.kind == "video"
    assert isinstance(rec.metadata["bit_rate"], int)


@pytest.mark.parametrize("rotation", [90, -90, 180])
def test_rotation_matches_np_rot90(tmp_path, rotation):
    # PyAV reports the display matrix as frame.rotation (degrees counter-clockwise) and
    # does not rotate pixels; the displayed image is np.rot90(arr, rotation // 90)
    # (CAMERA_NOTES 4, checked against OpenCV's auto-rotation there).
    path = tmp_path / "rot.mp4"
    planes = random_planes(np.random.default_rng(2), 48, 64, 3)
    write_yuv_video(path, planes, rotation=rotation, options={"qp": "0"})
    ref = pyav_raw_planes(path)
    assert ref[0][2] % 360 == rotation % 360  # PyAV reports 180 as -180 (range [-180, 180])
    rec = open_recording(path)
    k = rotation // 90
    expected_shape = (64, 48) if k % 2 else (48, 64)
    assert rec.shape == expected_shape
    assert rec.metadata["rotation"] % 360 == rotation % 360
    for fr, (raw, _, _) in zip(rec.frames(), ref):
        assert fr.data.shape == expected_shape
        np.testing.assert_array_equal(fr.data, np.rot90(raw[0], k))
        np.testing.assert_array_equal(fr.chroma[0], np.rot90(raw[1], k))
        np.testing.assert_array_equal(fr.chroma[1], np.rot90(raw[2], k))
        assert fr.chroma_step == (2, 2)


def test_video_planes_are_the_decoder_planes(tmp_path):
    # Lossless H.264 (libx264 qp=0) returns the encoded planes exactly; our planes must
    # equal bare PyAV's (PyAV Plane buffers, CAMERA_NOTES 4 "raw luma").
    path = tmp_path / "ll.mp4"
    planes = random_planes(np.random.default_rng(3), 40, 56, 4)
    write_yuv_video(path, planes, options={"qp": "0"})
    frames = list(open_recording(path).frames())
    assert len(frames) == 4
    for fr, (y, cb, cr) in zip(frames, planes):
        np.testing.assert_array_equal(fr.data, y)
        np.testing.assert_array_equal(fr.chroma[0], cb)
        np.testing.assert_array_equal(fr.chroma[1], cr)
        assert fr.kind == "video" and fr.bit_depth == 8 and fr.max_code == 255
        assert fr.yuv_matrix == "bt601" and fr.yuv_range == "limited"  # untagged -> 601
        assert not fr.data.flags.writeable


def test_video_colour_tags(tmp_path):
    # FFmpeg AVColorSpace 1 = BT.709, AVColorRange 2 = JPEG/full (libavutil/pixfmt.h).
    path = tmp_path / "tag.mp4"
    planes = random_planes(np.random.default_rng(4), 32, 32, 2)
    write_yuv_video(path, planes, colorspace=1, color_range=2, options={"qp": "0"})
    rec = open_recording(path)
    fr = next(rec.frames())
    assert (fr.yuv_matrix, fr.yuv_range) == ("bt709", "full")
    assert rec.metadata["yuv_matrix"] == "bt709"
    assert rec.metadata["yuv_matrix_tagged"] is True


def test_mjpeg_avi_is_full_range_422(tmp_path):
    # MJPEG decodes as yuvj422p (full range, JPEG/JFIF), CAMERA_NOTES 1.4 and brief.
    path = tmp_path / "mj.avi"
    rng = np.random.default_rng(5)
    planes = [(rng.integers(0, 256, (32, 48), dtype=np.uint8),
               np.full((32, 24), 128, np.uint8), np.full((32, 24), 128, np.uint8))]
    write_yuv_video(path, planes, pix_fmt="yuvj422p", codec="mjpeg")
    fr = next(open_recording(path).frames())
    assert fr.yuv_range == "full"
    assert fr.chroma_step == (1, 2)
    assert fr.chroma[0].shape == (32, 24)
    assert open_recording(path).metadata["codec"] == "mjpeg"


def test_hevc_and_444(tmp_path):
    # libx265 lossless and libx264 High 4:4:4 lossless return the encoded planes.
    rng = np.random.default_rng(6)
    planes = random_planes(rng, 32, 48, 2)
    path = tmp_path / "h.mp4"
    write_yuv_video(path, planes, codec="libx265",
                    options={"x265-params": "lossless=1:log-level=none"})
    frames = list(open_recording(path).frames())
    assert open_recording(path).metadata["codec"] == "hevc"
    np.testing.assert_array_equal(frames[0].data, planes[0][0])
    np.testing.assert_array_equal(frames[1].chroma[1], planes[1][2])
    p444 = random_planes(rng, 32, 48, 1, sub=(1, 1))
    path = tmp_path / "f444.mp4"
    write_yuv_video(path, p444, pix_fmt="yuv444p", options={"qp": "0"})
    fr = next(open_recording(path).frames())
    assert fr.chroma_step == (1, 1)
    np.testing.assert_array_equal(fr.chroma[0], p444[0][1])


def test_nv12_planes_equal_swscale_yuv420p():
    # FFmpeg swscale repacks NV12 -> yuv420p losslessly; our split of the interleaved
    # plane must give the same Cb, Cr (libswscale as reference).
    rng = np.random.default_rng(7)
    h, w = 24, 40
    nv = np.concatenate([rng.integers(0, 256, (h, w), dtype=np.uint8),
                         rng.integers(0, 256, (h // 2, w), dtype=np.uint8)])
    frame = av.VideoFrame.from_ndarray(nv, format="nv12")
    planes = _video_planes(frame, Path("x.mp4"))
    ref = frame.reformat(format="yuv420p").to_ndarray()
    np.testing.assert_array_equal(planes.y, ref[:h])
    cb_ref = ref[h:h + h // 4].reshape(h // 2, w // 2)
    cr_ref = ref[h + h // 4:].reshape(h // 2, w // 2)
    np.testing.assert_array_equal(planes.chroma[0], cb_ref)
    np.testing.assert_array_equal(planes.chroma[1], cr_ref)
    assert planes.chroma_step == (2, 2)


def test_ten_bit_video(tmp_path):
    # yuv420p10le planes are little-endian uint16 holding 10-bit codes (FFmpeg pixdesc).
    rng = np.random.default_rng(8)
    h, w = 32, 32
    y = rng.integers(64, 941, (h, w)).astype(np.uint16)
    path = tmp_path / "t10.mp4"
    out = av.open(str(path), "w")
    s = out.add_stream("libx264", rate=30)
    s.width, s.height, s.pix_fmt = w, h, "yuv420p10le"
    s.options = {"qp": "0"}
    f = av.VideoFrame(w, h, "yuv420p10le")
    for i, p in enumerate(f.planes):
        buf = np.frombuffer(p, "<u2").reshape(p.height, p.line_size // 2)
        buf[:, : p.width] = y if i == 0 else 512
    f.pts = 0
    for pk in s.encode(f):
        out.mux(pk)
    for pk in s.encode():
        out.mux(pk)
    out.close()
    fr = next(open_recording(path).frames())
    assert fr.bit_depth == 10 and fr.max_code == 1023
    assert fr.data.dtype == np.uint16
    np.testing.assert_array_equal(fr.data, y)


# ----------------------------------------------------------------------------- stills


def test_exif_round_trip_and_times(tmp_path):
    # Pillow is the reference writer of EXIF ExposureTime (0x829A), ISOSpeedRatings
    # (0x8827), DateTimeOriginal (0x9003) and SubSecTimeOriginal (0x9291).
    rng = np.random.default_rng(9)
    subsecs = ["000", "250", "600", "033"]
    seconds = ["10:00:00", "10:00:00", "10:00:00", "10:00:01"]
    for i, (sec, sub) in enumerate(zip(seconds, subsecs)):
        save_jpeg_with_exif(tmp_path / f"f{i}.jpg", rng.integers(0, 255, (24, 32, 3), np.uint8),
                            exposure=(1, 50 + i), iso=100 * (i + 1),
                            when=f"2024:05:01 {sec}", subsec=sub)
    info = read_exif(tmp_path / "f1.jpg")
    assert info.exposure_s == pytest.approx(1 / 51)
    assert info.iso == 200
    assert info.datetime_original.microsecond == 250000
    assert info.has_subsec
    rec = open_recording(tmp_path)
    assert rec.metadata["time_source"] == "exif"
    frames = list(rec.frames())
    np.testing.assert_allclose([f.time_s for f in frames], [0.0, 0.25, 0.6, 1.033], atol=1e-9)
    assert [f.exposure_s for f in frames] == pytest.approx([1 / 50, 1 / 51, 1 / 52, 1 / 53])
    assert [f.iso for f in frames] == [100, 200, 300, 400]


def test_times_fall_back_to_fps_then_index(tmp_path):
    # No EXIF: fps gives i / fps; without fps the index with a TimingWarning (contract).
    for i in range(3):
        Image.fromarray(np.full((8, 8), i, np.uint8)).save(tmp_path / f"p{i}.png")
    rec = open_recording(tmp_path, fps=4.0)
    assert [f.time_s for f in rec.frames()] == [0.0, 0.25, 0.5]
    assert rec.metadata["time_source"] == "fps"
    with pytest.warns(TimingWarning, match="fps"):
        rec = open_recording(tmp_path)
    assert [f.time_s for f in rec.frames()] == [0.0, 1.0, 2.0]
    assert rec.metadata["time_source"] == "index"


def test_whole_second_exif_duplicates_fall_back(tmp_path):
    # DateTimeOriginal has 1 s resolution (EXIF 2.32); a burst without SubSec gives equal
    # times, which cannot be used: fps is used instead.
    for i in range(3):
        save_jpeg_with_exif(tmp_path / f"b{i}.jpg", np.zeros((8, 8, 3), np.uint8),
                            when="2024:05:01 10:00:00")
    rec = open_recording(tmp_path, fps=10.0)
    assert rec.metadata["time_source"] == "fps"
    assert [f.time_s for f in rec.frames()] == pytest.approx([0.0, 0.1, 0.2])


@pytest.mark.parametrize("suffix", [".png", ".jpg"])
@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_matches_pillow(tmp_path, orientation, suffix):
    # Pillow's ImageOps.exif_transpose is the reference for EXIF Orientation 1..8 (for
    # JPEG both sides use Pillow's decoder, so the comparison is exact).
    arr = np.random.default_rng(10).integers(0, 255, (6, 10, 3), np.uint8)
    path = tmp_path / f"o{suffix}"
    exif = Image.Exif()
    exif[ExifTags.Base.Orientation] = orientation
    Image.fromarray(arr).save(path, exif=exif)
    expected = np.asarray(ImageOps.exif_transpose(Image.open(path)))
    fr = next(open_recording(path).frames())
    np.testing.assert_array_equal(fr.data, expected)
    assert open_recording(path).shape == expected.shape[:2]


@pytest.mark.parametrize("dtype, channels", [(np.uint8, 3), (np.uint16, 1), (np.uint16, 3)])
@pytest.mark.parametrize("orientation", [3, 6, 7, 8])
def test_tiff_orientation(tmp_path, orientation, dtype, channels):
    # TIFF 6.0 Orientation (tag 274) written with tifffile; the expected image is the same
    # transform Pillow's ImageOps.exif_transpose applies to a PNG (reference above).
    rng = np.random.default_rng(17)
    shape = (6, 10, 3) if channels == 3 else (6, 10)
    arr = rng.integers(0, np.iinfo(dtype).max, shape).astype(dtype)
    tifffile.imwrite(tmp_path / "o.tif", arr, photometric="rgb" if channels == 3 else None,
                     extratags=[(274, "H", 1, orientation)])
    probe = np.arange(60, dtype=np.uint8).reshape(6, 10)  # where each stored pixel goes
    exif = Image.Exif()
    exif[ExifTags.Base.Orientation] = orientation
    Image.fromarray(probe).save(tmp_path / "probe.png", exif=exif)
    moved = np.asarray(ImageOps.exif_transpose(Image.open(tmp_path / "probe.png")))
    expected = arr.reshape(60, -1)[moved.ravel()].reshape(moved.shape + shape[2:])
    rec = open_recording(tmp_path / "o.tif")
    assert rec.shape == moved.shape
    np.testing.assert_array_equal(next(rec.frames()).data, expected)


def test_jpeg_rgb_order_and_grey(tmp_path):
    # OpenCV decodes BGR; frames must be RGB. Pillow's decode is the reference.
    arr = np.zeros((16, 16, 3), np.uint8)
    arr[..., 0] = 200  # pure red
    Image.fromarray(arr).save(tmp_path / "r.jpg", quality=100)
    fr = next(open_recording(tmp_path / "r.jpg").frames())
    np.testing.assert_array_equal(fr.data, np.asarray(Image.open(tmp_path / "r.jpg")))
    assert fr.data[..., 0].mean() > 190 and fr.data[..., 2].mean() < 10
    Image.fromarray(np.full((5, 7), 77, np.uint8)).save(tmp_path / "g.png")
    g = next(open_recording(tmp_path / "g.png").frames())
    assert g.data.shape == (5, 7) and g.data.dtype == np.uint8


def test_png_bgr_written_by_opencv_reads_as_rgb(tmp_path):
    # cv2.imwrite takes BGR (OpenCV docs); the file's RGB is the reverse of that array.
    rgb = np.random.default_rng(11).integers(0, 65535, (9, 11, 3)).astype(np.uint16)
    cv2.imwrite(str(tmp_path / "c16.png"), rgb[..., ::-1])
    rec = open_recording(tmp_path / "c16.png")
    fr = next(rec.frames())
    assert rec.bit_depth == 16 and fr.bit_depth == 16 and fr.max_code == 65535
    np.testing.assert_array_equal(fr.data, rgb)


@pytest.mark.parametrize("shape", [(12, 20), (12, 20, 3)])
def test_tiff16_keeps_depth(tmp_path, shape):
    # tifffile as the reference writer of 16-bit grey and RGB TIFF.
    arr = np.random.default_rng(12).integers(0, 65536, shape).astype(np.uint16)
    tifffile.imwrite(tmp_path / "a.tif", arr, photometric="rgb" if len(shape) == 3 else None)
    rec = open_recording(tmp_path / "a.tif")
    assert rec.bit_depth == 16
    fr = next(rec.frames())
    assert fr.data.dtype == np.uint16
    np.testing.assert_array_equal(fr.data, arr)


def test_natural_sort(tmp_path):
    # Natural ("human") ordering of digit runs: common practice.
    names = ["img10.png", "img2.png", "img1.png", "IMG3.png", "img20.png"]
    for i, n in enumerate(names):
        Image.fromarray(np.full((4, 4), i, np.uint8)).save(tmp_path / n)
    (tmp_path / ".hidden.png").write_bytes(b"junk")
    (tmp_path / "notes.txt").write_text("ignored")
    rec = open_recording(tmp_path, fps=1.0)
    assert [Path(f).name for f in rec.files] == ["img1.png", "img2.png", "IMG3.png",
                                                "img10.png", "img20.png"]
    assert sorted(["a10", "a9", "a09b"], key=natural_key) == ["a9", "a09b", "a10"]
    listed = open_recording([tmp_path / "img10.png", tmp_path / "img2.png"], fps=1.0)
    assert [Path(f).name for f in listed.files] == ["img2.png", "img10.png"]


# ----------------------------------------------------------------------------- raw


def test_dng_mosaic_black_white(tmp_path):
    # DNG 1.4 BlackLevel with BlackLevelRepeatDim 2x2 gives the black per cell position;
    # rawpy maps it per colour (CAMERA_NOTES 5). The mosaic must be bit-exact.
    rng = np.random.default_rng(13)
    mosaic = (64 + rng.integers(0, 900, (32, 48))).astype(np.uint16)  # LibRaw refuses < ~22 px
    write_dng(tmp_path / "r.dng", mosaic, black=(64, 66, 68, 70), white=1023)
    rec = open_recording(tmp_path / "r.dng")
    assert rec.kind == "raw" and rec.shape == (32, 48) and rec.bit_depth == 10
    fr = next(rec.frames())
    np.testing.assert_array_equal(fr.data, mosaic)
    assert fr.max_code == 1023
    cell = np.array([[64, 66], [68, 70]], np.float32)
    np.testing.assert_array_equal(fr.black_level, np.tile(cell, (16, 24)))
    with rawpy.imread(str(tmp_path / "r.dng")) as raw:  # rawpy as the reference reader
        np.testing.assert_array_equal(fr.cfa, raw.raw_colors_visible)
    assert fr.exposure_s == pytest.approx(0.02)  # ExposureTime 1/50 (IFD0)
    assert fr.iso == 200


def test_dng_uniform_black_is_scalar(tmp_path):
    mosaic = np.full((32, 48), 100, np.uint16)
    write_dng(tmp_path / "u.dng", mosaic, black=(64, 64, 64, 64))
    fr = next(open_recording(tmp_path / "u.dng").frames())
    assert fr.black_level == 64.0


def test_not_a_dng(tmp_path):
    Image.fromarray(np.zeros((8, 8, 3), np.uint8)).save(tmp_path / "fake.jpg")
    (tmp_path / "fake.dng").write_bytes((tmp_path / "fake.jpg").read_bytes())
    with pytest.raises(InputFormatError, match="DNG") as info:
        open_recording(tmp_path / "fake.dng")
    assert info.value.path == str(tmp_path / "fake.dng")
    assert isinstance(info.value.__cause__, rawpy.LibRawError)


# ----------------------------------------------------------------------------- bad input


def test_missing_path_and_empty_folder(tmp_path):
    with pytest.raises(InputFormatError, match="no such file") as info:
        open_recording(tmp_path / "nope")
    assert info.value.path == str(tmp_path / "nope")
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputFormatError, match="no JPEG, PNG, TIFF or DNG"):
        open_recording(tmp_path / "empty")
    with pytest.raises(InputFormatError, match="empty"):
        open_recording([])


def test_folder_with_only_a_video(tmp_path):
    write_yuv_video(tmp_path / "v.mp4", random_planes(np.random.default_rng(0), 16, 16, 1))
    with pytest.raises(InputFormatError, match="pass the video file itself"):
        open_recording(tmp_path)


def test_mixed_sizes_names_the_file(tmp_path):
    Image.fromarray(np.zeros((10, 12, 3), np.uint8)).save(tmp_path / "a1.png")
    Image.fromarray(np.zeros((10, 13, 3), np.uint8)).save(tmp_path / "a2.png")
    with pytest.raises(ShapeMismatchError, match="13x10 but the first frame") as info:
        open_recording(tmp_path)
    assert info.value.path.endswith("a2.png")


def test_mixed_bit_depths_names_the_file(tmp_path):
    cv2.imwrite(str(tmp_path / "d1.png"), np.zeros((6, 6, 3), np.uint8))
    cv2.imwrite(str(tmp_path / "d2.png"), np.zeros((6, 6, 3), np.uint16))
    with pytest.raises(ShapeMismatchError, match="16-bit") as info:
        open_recording(tmp_path)
    assert info.value.path.endswith("d2.png")


def test_grey_and_colour_mixed(tmp_path):
    Image.fromarray(np.zeros((6, 6, 3), np.uint8)).save(tmp_path / "m1.png")
    Image.fromarray(np.zeros((6, 6), np.uint8)).save(tmp_path / "m2.png")
    rec = open_recording(tmp_path, fps=1)
    with pytest.raises(ShapeMismatchError, match="grey") as info:
        list(rec.frames())
    assert info.value.path.endswith("m2.png")


def test_truncated_jpeg_and_png(tmp_path):
    # libjpeg reports "Premature end of JPEG file" and OpenCV would return a grey-filled
    # image; Pillow raises OSError (CAMERA_NOTES-style check, run here).
    arr = np.random.default_rng(14).integers(0, 255, (64, 64, 3), np.uint8)
    Image.fromarray(arr).save(tmp_path / "full.jpg")
    data = (tmp_path / "full.jpg").read_bytes()
    (tmp_path / "cut.jpg").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputFormatError, match="truncated") as info:
        list(open_recording(tmp_path / "cut.jpg").frames())
    assert info.value.path.endswith("cut.jpg")
    cv2.imwrite(str(tmp_path / "full.png"), arr)
    data = (tmp_path / "full.png").read_bytes()
    (tmp_path / "cut.png").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputFormatError, match="truncated"):
        list(open_recording(tmp_path / "cut.png").frames())


def test_text_files_with_image_and_video_names(tmp_path):
    (tmp_path / "x.jpg").write_text("not an image")
    with pytest.raises(InputFormatError, match="not a readable") as info:
        open_recording(tmp_path / "x.jpg")
    assert info.value.path.endswith("x.jpg")
    (tmp_path / "x.mp4").write_text("not a video")
    with pytest.raises(InputFormatError, match="not a readable video") as info:
        open_recording(tmp_path / "x.mp4")
    assert isinstance(info.value.__cause__, av.FFmpegError)


def test_audio_only_mp4(tmp_path):
    # PyAV's AAC encoder writes an MP4 with one audio stream and no video.
    path = tmp_path / "a.mp4"
    out = av.open(str(path), "w")
    s = out.add_stream("aac", rate=8000)
    frame = av.AudioFrame.from_ndarray(np.zeros((1, 1024), np.float32), format="fltp",
                                       layout="mono")
    frame.sample_rate = 8000
    frame.pts = 0
    for pk in s.encode(frame):
        out.mux(pk)
    for pk in s.encode():
        out.mux(pk)
    out.close()
    with pytest.raises(InputFormatError, match="no video stream"):
        open_recording(path)


def test_decompression_bomb_refused_before_decoding(tmp_path):
    # A 60-byte PNG that claims 12000 x 10000 = 120 megapixels (> DEFAULT_MAX_PIXELS):
    # refused on its header; decoding would need 360 MB (common practice: Pillow's
    # MAX_IMAGE_PIXELS guard does the same above 89 MP, with a warning only).
    path = tmp_path / "bomb.png"
    png_header_only(path, 12000, 10000)
    assert path.stat().st_size < 200
    assert 12000 * 10000 > DEFAULT_MAX_PIXELS
    with pytest.raises(InputFormatError, match="megapixels") as info:
        open_recording(path)
    assert info.value.path == str(path)
    # And a far larger claim, which Pillow itself refuses, is reported the same way.
    png_header_only(path, 40000, 40000)
    with pytest.raises(InputFormatError, match="megapixels"):
        open_recording(path)
    # The limit is configurable.
    Image.fromarray(np.zeros((20, 20), np.uint8)).save(tmp_path / "small.png")
    with pytest.raises(InputFormatError, match="megapixels"):
        open_recording(tmp_path / "small.png", max_pixels=399)
    assert open_recording(tmp_path / "small.png", max_pixels=400).shape == (20, 20)


def test_unsupported_suffix(tmp_path):
    (tmp_path / "data.csv").write_text("a,b\n")
    with pytest.raises(InputFormatError, match="unsupported file type"):
        open_recording(tmp_path / "data.csv")


# ----------------------------------------------------------------------------- streaming


def test_frames_is_a_fresh_generator_and_does_not_hold_frames(tmp_path):
    # Streaming contract: frames() returns a new generator each call and keeps no
    # reference to frames already yielded (checked with weakref, Python docs).
    path = tmp_path / "long.mp4"
    rng = np.random.default_rng(15)
    base = random_planes(rng, 32, 32, 1)[0]
    write_yuv_video(path, [base] * 300, options={"preset": "ultrafast"})
    rec = open_recording(path)
    gen = rec.frames()
    assert inspect.isgenerator(gen) and rec.frames() is not gen
    refs = []
    n = 0
    for fr in gen:
        refs.append(weakref.ref(fr))
        n += 1
    del fr
    gc.collect()
    assert n == 300
    assert sum(r() is not None for r in refs) == 0
    # A second pass yields the same frames again.
    assert sum(1 for _ in rec.frames()) == 300
    assert sum(1 for _ in iter_frames(path)) == 300


def test_stills_memory_stays_flat(tmp_path):
    # tracemalloc (Python docs) traces numpy buffers: the peak while streaming 200
    # stills must stay near a few frames, not grow with their number.
    rng = np.random.default_rng(16)
    for i in range(200):
        cv2.imwrite(str(tmp_path / f"s{i:03d}.png"),
                    rng.integers(0, 255, (64, 64, 3), np.uint8))
    rec = open_recording(tmp_path, fps=10)
    frame_bytes = 64 * 64 * 3
    tracemalloc.start()
    try:
        total = 0
        for fr in rec.frames():
            total += int(fr.data[0, 0, 0])
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 20 * frame_bytes  # 200 frames held would be 200 x frame_bytes


def test_read_ahead_gives_the_same_frames_in_order_as_inline_decoding(tmp_path, monkeypatch):
    # Contract of the read-ahead (common practice for producer/consumer pipelines): the
    # frames, their order and their pixels are those of decoding one file at a time.
    from ecl_quant import frames as frames_mod

    rng = np.random.default_rng(31)
    for i in range(9):
        save_jpeg_with_exif(tmp_path / f"f{i}.jpg", rng.integers(0, 255, (40, 48, 3), np.uint8),
                            exposure=(1, 30), iso=100, when="2024:05:01 10:00:00",
                            subsec=str(i))
    rec = open_recording(tmp_path)
    threaded = [(fr.source, fr.data.copy()) for fr in rec.frames()]
    monkeypatch.setattr(frames_mod, "READ_AHEAD", 0)
    inline = [(fr.source, fr.data.copy()) for fr in rec.frames()]
    assert [s for s, _ in threaded] == [s for s, _ in inline]
    assert [Path(s).name for s, _ in threaded] == [f"f{i}.jpg" for i in range(9)]
    for (_, a), (_, b) in zip(threaded, inline):
        np.testing.assert_array_equal(a, b)
    # Pillow (reference decoder) on the fifth file.
    with Image.open(tmp_path / "f4.jpg") as im:
        np.testing.assert_array_equal(threaded[4][1], np.asarray(im))


def test_read_ahead_raises_a_bad_file_in_its_place(tmp_path):
    # Frames before a damaged file come out first, then its typed error (as without
    # read-ahead), even though the damaged file was decoded ahead of the consumer.
    rng = np.random.default_rng(32)
    for i in range(6):
        Image.fromarray(rng.integers(0, 255, (32, 32, 3), np.uint8)).save(tmp_path / f"s{i}.jpg")
    data = (tmp_path / "s3.jpg").read_bytes()
    (tmp_path / "s3.jpg").write_bytes(data[: len(data) // 2])
    seen = []
    with pytest.raises(InputFormatError, match="truncated") as info:
        for fr in open_recording(tmp_path, fps=10).frames():
            seen.append(Path(fr.source).name)
    assert seen == ["s0.jpg", "s1.jpg", "s2.jpg"]
    assert info.value.path.endswith("s3.jpg")


def _open_files() -> list[str]:
    """Paths this process has open (Linux /proc/self/fd, proc(5)); empty elsewhere."""
    fds = Path("/proc/self/fd")
    links = []
    if fds.is_dir():
        for fd in fds.iterdir():
            try:
                links.append(os.readlink(fd))
            except OSError:
                continue
    return links


def test_read_ahead_stops_cleanly_when_the_consumer_stops(tmp_path):
    # Closing the generator early must cancel the queued decodes, join the worker and
    # close the files it opened (threading docs: no lingering reader thread).
    import threading

    rng = np.random.default_rng(33)
    for i in range(30):
        Image.fromarray(rng.integers(0, 255, (32, 32), np.uint8)).save(tmp_path / f"s{i:02d}.jpg")
    gen = open_recording(tmp_path, fps=10).frames()
    first = next(gen)
    assert Path(first.source).name == "s00.jpg"
    gen.close()
    assert not [t for t in threading.enumerate() if t.name.startswith("ecl-quant-read")]
    # No file of the folder is still open.
    assert not [f for f in _open_files() if f.startswith(str(tmp_path))]


def test_video_decoded_ahead_equals_inline_decoding(tmp_path, monkeypatch):
    # The video read-ahead thread must give PyAV's own frames (reference decoder), in
    # order, with their timestamps; closing early must join the thread and close the
    # container (threading docs: no lingering thread; proc(5) for open files).
    import threading

    from ecl_quant import frames as frames_mod

    rng = np.random.default_rng(34)
    planes = [(rng.integers(16, 235, (48, 64), np.uint8), np.full((24, 32), 128, np.uint8),
               np.full((24, 32), 128, np.uint8)) for _ in range(20)]
    path = tmp_path / "v.mp4"
    write_yuv_video(path, planes, options={"crf": "0"})
    rec = open_recording(path)
    ahead = [(fr.time_s, fr.data.copy()) for fr in rec.frames()]
    monkeypatch.setattr(frames_mod, "READ_AHEAD", 0)
    inline = [(fr.time_s, fr.data.copy()) for fr in rec.frames()]
    with av.open(str(path)) as c:
        reference = [np.frombuffer(f.planes[0], np.uint8).reshape(
            f.planes[0].height, f.planes[0].line_size)[:, :f.width].copy()
            for f in c.decode(video=0)]  # PyAV's decoded Y' plane
    assert len(ahead) == len(inline) == len(reference) == 20
    for (ta, a), (tb, b), r in zip(ahead, inline, reference):
        assert ta == tb
        np.testing.assert_array_equal(a, b)
        np.testing.assert_array_equal(a, r)
    monkeypatch.setattr(frames_mod, "READ_AHEAD", 2)
    gen = rec.frames()
    next(gen)
    gen.close()
    assert not [t for t in threading.enumerate() if t.name == "ecl-quant-decode"]
    assert str(path) not in _open_files()


def test_decoded_ahead_keeps_warnings_and_errors_in_place():
    # Warnings given by the producer come out in the consumer's thread between the same
    # items; an error after the items before it (common practice for producer/consumer
    # pipelines, as without read-ahead).
    import threading
    import warnings as warnings_mod

    from ecl_quant.frames import _decoded_ahead

    def make(warn):
        yield 1
        warn("between 1 and 2", TimingWarning)
        yield 2
        raise InputFormatError("broken after 2", path="x")

    seen = []
    with pytest.raises(InputFormatError, match="broken after 2"):
        with warnings_mod.catch_warnings(record=True) as caught:
            warnings_mod.simplefilter("always")
            for item in _decoded_ahead(make, 2):
                seen.append((item, len(caught), threading.current_thread().name))
    assert [(a, b) for a, b, _ in seen] == [(1, 0), (2, 1)]
    assert str(caught[0].message) == "between 1 and 2" and caught[0].category is TimingWarning
    assert seen[0][2] == threading.current_thread().name


# ----------------------------------------------------------------------------- robustness

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402


@pytest.fixture(scope="module")
def valid_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("valid")
    rng = np.random.default_rng(18)
    arr = rng.integers(0, 255, (24, 32, 3), np.uint8)
    save_jpeg_with_exif(d / "a.jpg", arr, exposure=(1, 30), iso=100,
                        when="2024:05:01 10:00:00", subsec="5")
    cv2.imwrite(str(d / "a.png"), arr)
    tifffile.imwrite(d / "a.tif", arr.astype(np.uint16) * 257, photometric="rgb")
    write_dng(d / "a.dng", (64 + rng.integers(0, 900, (32, 48))).astype(np.uint16))
    write_yuv_video(d / "a.mp4", random_planes(rng, 32, 32, 4))
    return {p.suffix: p.read_bytes() for p in d.iterdir()}


@settings(max_examples=int(os.environ.get("ECL_QUANT_FUZZ_EXAMPLES", "60")), deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_damaged_files_raise_typed_errors(tmp_path, valid_files, data):
    # Any truncation or byte damage must end in a frame list or a typed ecl_quant error,
    # never a raw library exception (contract: bad input -> InputFormatError).
    suffix = data.draw(st.sampled_from(sorted(valid_files)))
    blob = bytearray(valid_files[suffix])
    cut = data.draw(st.integers(0, len(blob)))
    flips = data.draw(st.lists(st.tuples(st.integers(0, len(blob) - 1), st.integers(0, 255)),
                               max_size=8))
    for pos, val in flips:
        blob[pos] = val
    path = tmp_path / f"damaged{suffix}"
    path.write_bytes(bytes(blob[:cut]))
    try:
        for fr in open_recording(path).frames():
            assert fr.data.ndim in (2, 3)
    except (InputFormatError, ShapeMismatchError) as err:
        assert err.path is not None


def test_one_core_decoding_gives_the_same_frames(tmp_path, monkeypatch):
    # Batch workers that fill the cores decode single-threaded (frames.use_one_core):
    # H.264 decoding is exact whatever the threading (the codec is deterministic;
    # FFmpeg threading docs), so the frames must be identical to the default's.
    from ecl_quant import frames as frames_mod

    path = tmp_path / "v.mp4"
    rng = np.random.default_rng(34)
    write_yuv_video(path, random_planes(rng, 48, 64, 12), options={"preset": "ultrafast"})
    default = [fr.data.copy() for fr in open_recording(path).frames()]
    monkeypatch.setattr(frames_mod, "READ_AHEAD", frames_mod.READ_AHEAD)
    monkeypatch.setattr(frames_mod, "VIDEO_THREAD_TYPE", frames_mod.VIDEO_THREAD_TYPE)
    frames_mod.use_one_core()
    assert frames_mod.READ_AHEAD == 0 and frames_mod.VIDEO_THREAD_TYPE == "NONE"
    single = [fr.data.copy() for fr in open_recording(path).frames()]
    assert len(single) == len(default) == 12
    for a, b in zip(single, default):
        np.testing.assert_array_equal(a, b)


def test_fast_start_mp4_cut_short_warns(tmp_path):
    # A fast-start MP4 (index before the data; FFmpeg movflags=faststart) cut short still
    # opens and ends early; the reader must say so instead of measuring a partial
    # recording silently. The full file must not warn.
    from ecl_quant.errors import IncompleteRecordingWarning

    path = tmp_path / "fs.mp4"
    rng = np.random.default_rng(35)
    out = av.open(str(path), "w", options={"movflags": "faststart"})
    stream = out.add_stream("libx264", rate=30)
    stream.width, stream.height, stream.pix_fmt = 64, 48, "yuv420p"
    for i in range(90):
        frame = av.VideoFrame.from_ndarray(rng.integers(0, 255, (72, 64), np.uint8),
                                           format="yuv420p")
        frame.pts = i
        for packet in stream.encode(frame):
            out.mux(packet)
    for packet in stream.encode(None):
        out.mux(packet)
    out.close()
    assert sum(1 for _ in open_recording(path).frames()) == 90  # no warning (-W error)
    cut = tmp_path / "cut.mp4"
    data = path.read_bytes()
    cut.write_bytes(data[: int(len(data) * 0.6)])
    rec = open_recording(cut)
    assert rec.n_frames == 90
    with pytest.warns(IncompleteRecordingWarning, match=r"of the 90 frames") as info:
        n = sum(1 for _ in rec.frames())
    assert 0 < n < 90
    assert f"after {n} of the 90" in str(info[0].message)
