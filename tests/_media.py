"""Reference writers for test media: PyAV (FFmpeg) encodes given Y'CbCr planes and
tifffile writes a minimal DNG (shared/CAMERA_NOTES.md section 5: rawpy reads it
bit-exactly). Shared by tests/test_frames.py and tests/test_radiometry.py. Also a
camera.json of a simulated sensor (the project's EMVA 1288 analysis on known gain and
read noise: simulated ground truth), shared by the noise-model and batch tests.
"""

from __future__ import annotations

import av
import numpy as np
import tifffile

def write_yuv_video(path, planes, *, pix_fmt="yuv420p", codec="libx264", pts=None,
                    time_base=None, rotation=None, colorspace=None, color_range=None,
                    options=None, rate=30):
    """Encode frames given as (Y, Cb, Cr) uint8 planes with PyAV (reference encoder)."""
    h, w = planes[0][0].shape
    out = av.open(str(path), "w")
    stream = out.add_stream(codec, rate=rate)
    stream.width, stream.height, stream.pix_fmt = w, h, pix_fmt
    if options:
        stream.options = options
    if time_base is not None:
        stream.time_base = time_base
        stream.codec_context.time_base = time_base
    if colorspace is not None:
        stream.codec_context.colorspace = colorspace
    if color_range is not None:
        stream.codec_context.color_range = color_range
    if rotation is not None:
        stream.set_display_rotation(rotation)
    for i, trio in enumerate(planes):
        frame = av.VideoFrame(w, h, pix_fmt)
        for plane, arr in zip(frame.planes, trio):
            buf = np.frombuffer(plane, np.uint8).reshape(plane.height, plane.line_size)
            buf[:, : plane.width] = arr
        if colorspace is not None:
            frame.colorspace = colorspace
        if color_range is not None:
            frame.color_range = color_range
        frame.pts = pts[i] if pts is not None else i
        if time_base is not None:
            frame.time_base = time_base
        for packet in stream.encode(frame):
            out.mux(packet)
    for packet in stream.encode():
        out.mux(packet)
    out.close()


def write_dng(path, mosaic, *, black=(64, 64, 64, 64), white=1023, cfa=(0, 1, 1, 2),
              exposure=(1, 50), iso=200):
    """Minimal DNG written with tifffile (CAMERA_NOTES 5: rawpy reads it bit-exactly)."""
    extratags = [
        (50706, "B", 4, (1, 4, 0, 0)),  # DNGVersion
        (33421, "H", 2, (2, 2)),  # CFARepeatPatternDim
        (33422, "B", 4, cfa),  # CFAPattern
        (50713, "H", 2, (2, 2)),  # BlackLevelRepeatDim
        (50714, "H", 4, black),  # BlackLevel (per position in the 2x2 cell)
        (50717, "H", 1, white),  # WhiteLevel
        (33434, "2I", 1, exposure),  # ExposureTime
        (34855, "H", 1, iso),  # ISOSpeedRatings
        (271, "s", 5, "Tern\x00"),  # Make (LibRaw needs it)
        (272, "s", 5, "Cam1\x00"),  # Model
        (50708, "s", 6, "Test\x00"),  # UniqueCameraModel
        (50721, "2i", 9, (1, 1, 0, 1, 0, 1) * 3),  # ColorMatrix1 (identity)
    ]
    tifffile.imwrite(path, mosaic, photometric=32803, extratags=extratags, subfiletype=0)


def write_simulated_camera_json(folder, *, shape=(128, 128), seed=3):
    """camera.json (``ecl-quant camera`` outputs) of a simulated sensor with gain 0.45 DN/e-
    and read noise 2.8 e- in ``folder``; returns (path, simulation)."""
    from ecl_quant._camsim import simulate_flat_pairs
    from ecl_quant.camera import photon_transfer, write_camera_outputs

    sim = simulate_flat_pairs(gain_dn_per_e=0.45, read_noise_e=2.8, full_well_e=12000,
                              shape=shape, seed=seed)
    res = photon_transfer([f[:2] for f in sim.flats], [d[:2] for d in sim.darks],
                          sim.exposure_s, max_code=sim.truth.max_code)
    write_camera_outputs(res, folder)
    return folder / "camera.json", sim
