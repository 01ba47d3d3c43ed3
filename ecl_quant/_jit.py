"""Compiled per-frame kernels (C, loaded with ctypes), with the numpy code as the reference.

The per-frame work of :class:`ecl_quant.curves.SpotIntegrator` is a handful of passes
over the same few hundred thousand aperture and annulus pixels: gather their codes,
look up the values, weighted sums per spot, a code histogram per annulus, sigma
clipping and the noise statistics. In numpy each pass is a separate call with its own
temporaries (about 2 ms per 1080p frame); compiled (``ecl_quant/native/integrator.c``)
they are one call that reads only those pixels, straight from the decoded planes. The
results are those of the numpy path of ``SpotIntegrator.add`` (sums may differ by
~1e-16 relative); the tests run both on the same frames.

The kernels are plain C built at install as optional extension modules
(``ecl_quant._native_<name>``, see setup.py): no compiler, no kernels, and the numpy
code runs. They cost no import time and almost no memory (a JIT compiler such as
numba added ~120 MB to a measurement's peak memory). Set ``ECL_QUANT_JIT=0`` to use
the numpy code everywhere (for comparison).
"""

from __future__ import annotations

import ctypes
import importlib
import os
import threading
import types
import warnings
from typing import Any, Callable

import numpy as np
from numpy.typing import NDArray

from .native import sources as _sources

__all__ = ["NativeOutOfDateWarning", "enabled", "kernels", "native"]

_lock = threading.Lock()
_kernels: types.SimpleNamespace | None = None


def enabled() -> bool:
    """True unless ``ECL_QUANT_JIT`` is 0/false/no/off."""
    return os.environ.get("ECL_QUANT_JIT", "1").strip().lower() not in ("0", "false", "no", "off")


class NativeOutOfDateWarning(UserWarning):
    """A compiled kernel library is older than its C sources (rebuild: make install)."""


_libraries: dict[str, ctypes.CDLL | None] = {}


def native(name: str) -> ctypes.CDLL | None:
    """The compiled kernel library ``ecl_quant._native_<name>`` (from
    ``ecl_quant/native/<name>.c``), loaded with ctypes; None when disabled
    (``ECL_QUANT_JIT=0``), not built (no C compiler at install) or older than its
    sources beside it (warns :class:`NativeOutOfDateWarning`). Callers declare the
    argument types of the functions they use."""
    if not enabled():
        return None
    with _lock:
        if name in _libraries:
            return _libraries[name]
        lib = None
        try:
            module = importlib.import_module(f"ecl_quant._native_{name}")
            lib = ctypes.CDLL(str(module.__file__))
        except (ImportError, OSError):
            lib = None
        if lib is not None:
            lib.ecl_native_source_hash.restype = ctypes.c_char_p
            built = lib.ecl_native_source_hash().decode()
            expected = _sources.source_hash(name)
            if expected is not None and built != expected:
                warnings.warn(
                    f"the compiled kernels ecl_quant._native_{name} are older than "
                    f"ecl_quant/native/{name}.c; using the numpy code (rebuild with "
                    "`make install` or `pip install -e .`)", NativeOutOfDateWarning,
                    stacklevel=2)
                lib = None
        _libraries[name] = lib
        return lib


def _pointer(a: NDArray[Any] | None) -> int | None:
    return None if a is None else int(a.ctypes.data)


def kernels() -> types.SimpleNamespace | None:
    """The integrator's kernels (``spot_frame``, ``spot_frame_planes``,
    ``gather_planes``, ``clip_rows``) as Python functions over numpy arrays, or None
    (disabled or not built)."""
    global _kernels
    lib = native("integrator")
    if lib is None:
        return None
    with _lock:
        if _kernels is None or _kernels.lib is not lib:
            _kernels = _wrap_integrator(lib)
    return _kernels


def _wrap_integrator(lib: ctypes.CDLL) -> types.SimpleNamespace:
    p, i64, dbl, i32 = ctypes.c_void_p, ctypes.c_int64, ctypes.c_double, ctypes.c_int
    plane = [p, i64, i64, i64, p, i64, i64, i64, i64, i64, i64, i64, i64]
    lib.ecl_gather.argtypes = plane + [p, i64, i64, i64, p, p, p]
    lib.ecl_gather.restype = None
    lib.ecl_clip_rows.argtypes = [p, p, p, p, i64, dbl, p, p, p, p]
    lib.ecl_clip_rows.restype = i32
    lib.ecl_spot_frame.argtypes = (plane + [p, i64, i64, i64, p, p, i64, p, p, p, p, i64,
                                            p, p, i32, i32, dbl, p, p, p, p, p, p, p, p,
                                            p, p])
    lib.ecl_spot_frame.restype = i32

    def plane_args(luma: NDArray[Any], chroma: NDArray[Any] | None, r0: int, c0: int,
                   sy_shift: int, sx_shift: int) -> list[Any]:
        if luma.dtype.itemsize not in (1, 2) or luma.ndim != 2:
            raise ValueError("codes must be a 2-D plane of 8- or 16-bit samples")
        if chroma is None:
            c = [None, 0, 0, 0, 0]
        else:
            if chroma.dtype.itemsize != 1 or luma.dtype.itemsize != 1:
                raise ValueError("paired codes need 8-bit luma and chroma planes")
            c = [_pointer(chroma), chroma.strides[0], chroma.strides[1], chroma.shape[0],
                 chroma.shape[1]]
        return [_pointer(luma), luma.strides[0], luma.strides[1], luma.dtype.itemsize, *c,
                int(r0), int(c0), int(sy_shift), int(sx_shift)]

    def frame(pl: list[Any], runs: NDArray[np.int64], dy: int, dx: int,
              table: NDArray[np.float32], starts: NDArray[np.int64],
              ap_w: NDArray[np.float32], ap_w2: NDArray[np.float32],
              hit: NDArray[np.int64], hit_values: NDArray[np.float32],
              x0: NDArray[np.float32], x1: NDArray[np.float32], with_noise: bool,
              paired: bool, clip_sigma: float, vals: NDArray[np.float32]) -> tuple[Any, ...]:
        n = (starts.size - 1) // 2
        out = [np.zeros(n) for _ in range(5)]
        cnt = np.zeros(n, np.int64)
        lev = np.full(2 * n, np.nan)
        sq = np.full(2 * n, np.nan)
        y_max = np.zeros(1, np.int64)
        runs = np.ascontiguousarray(runs, np.int64)
        hit = np.ascontiguousarray(hit, np.int64)
        hit_values = np.ascontiguousarray(hit_values, np.float32)
        # The C code trusts its arguments: check what it indexes with.
        n_pix = int(starts[-1])
        ok = (vals.size == n_pix and runs.ndim == 2 and runs.shape[1] == 4
              and (runs.size == 0 or int((runs[:, 0] + runs[:, 3]).max()) <= n_pix)
              and table.dtype == np.float32 and table.flags.c_contiguous
              and starts.dtype == np.int64 and starts.flags.c_contiguous
              and all(a.dtype == np.float32 and a.flags.c_contiguous
                      for a in (ap_w, ap_w2, vals))
              and ap_w.size >= int(starts[n]) and ap_w2.size >= int(starts[n])
              and (hit.size == 0 or (0 <= int(hit.min()) and int(hit.max()) < n_pix))
              and hit_values.size == hit.size
              and (not with_noise or all(a.dtype == np.float32 and a.flags.c_contiguous
                                         and a.size == n_pix for a in (x0, x1))))
        if not ok:
            raise ValueError("compiled integrator kernel: inconsistent arguments")
        status = lib.ecl_spot_frame(
            *pl, _pointer(runs), runs.shape[0], int(dy), int(dx), _pointer(table),
            _pointer(starts), n, _pointer(ap_w), _pointer(ap_w2), _pointer(hit),
            _pointer(hit_values), hit.size, _pointer(x0) if with_noise else None,
            _pointer(x1) if with_noise else None, int(bool(with_noise)), int(bool(paired)),
            float(clip_sigma), _pointer(vals), *(_pointer(a) for a in out), _pointer(cnt),
            _pointer(lev), _pointer(sq), _pointer(y_max))
        if status < 0:
            raise MemoryError("compiled integrator kernel: out of memory")
        s1, s2, med, mean, sd = out
        return s1, s2, med, mean, sd, cnt, lev, sq, int(y_max[0]), status == 1

    def spot_frame(codes: NDArray[Any], runs: NDArray[np.int64], dy: int, dx: int,
                   *rest: Any) -> tuple[Any, ...]:
        """One frame from a crop of codes (``paired``: Y' * 256 + C)."""
        return frame(plane_args(codes, None, 0, 0, 0, 0), runs, dy, dx, *rest)

    def spot_frame_planes(luma: NDArray[Any], chroma: NDArray[Any] | None, r0: int, c0: int,
                          sy_shift: int, sx_shift: int, runs: NDArray[np.int64], dy: int,
                          dx: int, *rest: Any) -> tuple[Any, ...]:
        """One frame from the decoded planes (chroma None: single codes)."""
        return frame(plane_args(luma, chroma, r0, c0, sy_shift, sx_shift), runs, dy, dx,
                     *rest)

    def gather_planes(luma: NDArray[Any], chroma: NDArray[Any] | None, r0: int, c0: int,
                      sy_shift: int, sx_shift: int, runs: NDArray[np.int64], dy: int, dx: int,
                      table: NDArray[np.float32], vals: NDArray[np.float32],
                      keys: NDArray[np.int32]) -> None:
        """Codes (into ``keys``) and values (into ``vals``) of the runs' entries."""
        runs = np.ascontiguousarray(runs, np.int64)
        lib.ecl_gather(*plane_args(luma, chroma, r0, c0, sy_shift, sx_shift),
                       _pointer(runs), runs.shape[0], int(dy), int(dx), _pointer(table),
                       _pointer(keys), _pointer(vals))

    def clip_rows(cv: NDArray[np.float64], cc: NDArray[np.int64], width: NDArray[np.int64],
                  clip_sigma: float) -> tuple[Any, ...]:
        """Clipping of padded rows of distinct ascending values with counts."""
        cv = np.ascontiguousarray(cv, np.float64)
        cc = np.ascontiguousarray(cc, np.int64)
        n, stride = cv.shape
        off = np.arange(n, dtype=np.int64) * stride
        width = np.ascontiguousarray(width, np.int64)
        med, mean, sd = np.zeros(n), np.zeros(n), np.zeros(n)
        cnt = np.zeros(n, np.int64)
        if lib.ecl_clip_rows(_pointer(cv), _pointer(cc), _pointer(off), _pointer(width), n,
                             float(clip_sigma), _pointer(med), _pointer(mean), _pointer(sd),
                             _pointer(cnt)) != 0:
            raise MemoryError("compiled clipping kernel: out of memory")
        return med, mean, sd, cnt

    return types.SimpleNamespace(lib=lib, spot_frame=spot_frame,
                                 spot_frame_planes=spot_frame_planes,
                                 gather_planes=gather_planes, clip_rows=clip_rows)


def as_runs(flat: NDArray[np.integer[Any]], width: int) -> NDArray[np.int64]:
    """Flat indices into an array ``width`` wide as runs of consecutive columns in one
    row: (n_runs, 4) rows of (first entry, row, column, length)."""
    r, c = np.divmod(np.asarray(flat, np.int64), int(width))
    new = np.ones(r.size, bool)
    if r.size:
        new[1:] = (r[1:] != r[:-1]) | (c[1:] != c[:-1] + 1)
    first = np.flatnonzero(new)
    length = np.diff(np.append(first, r.size))
    return np.column_stack([first, r[first], c[first], length]).astype(np.int64)
