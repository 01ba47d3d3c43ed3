"""Compiled per-frame kernels (numba), with the numpy code as the reference.

The per-frame work of :class:`ecl_quant.curves.SpotIntegrator` is a handful of passes
over the same few hundred thousand aperture and annulus pixels: gather their codes,
look up the values, weighted sums per spot, a code histogram per annulus, sigma
clipping and the noise statistics. In numpy each pass is a separate call with its own
temporaries (about 2 ms per 1080p frame); compiled, they are one loop over the pixels
(well under 0.5 ms). :func:`spot_frame` does exactly what the numpy path of
``SpotIntegrator.add`` does, in the same order of float32 and float64 operations; the
tests run both on the same frames.

numba is imported on first use, not at import of the package (the import alone costs
about half a second, which every command would pay). Compiled code is cached on disk
(numba's ``cache=True``: beside this module or, where that is not writable, in the
user's cache folder), so only the first run on a machine compiles. Set the environment
variable ``ECL_QUANT_JIT=0`` to use the numpy path everywhere (for comparison or where
numba is not installed: then it is used automatically).
"""

from __future__ import annotations

import os
import threading
import types
from typing import Any, Callable

import numpy as np
from numpy.typing import NDArray

__all__ = ["enabled", "kernels"]

_lock = threading.Lock()
_kernels: types.SimpleNamespace | None = None
_failed = False


def enabled() -> bool:
    """True unless ``ECL_QUANT_JIT`` is 0/false/no/off."""
    return os.environ.get("ECL_QUANT_JIT", "1").strip().lower() not in ("0", "false", "no", "off")


def kernels() -> types.SimpleNamespace | None:
    """All compiled kernels (``spot_frame``, ``clip_rows``, ``aperture_sums``,
    ``noise_sums``), compiled or loaded from the cache on first use; None when disabled
    or numba is not installed."""
    global _kernels, _failed
    if not enabled() or _failed:
        return None
    if _kernels is None:
        with _lock:
            if _kernels is None and not _failed:
                try:
                    _kernels = _compile()
                except (ImportError, RuntimeError):
                    # no numba, or no writable folder for its disk cache
                    _failed = True
                    return None
    return _kernels


def _compile() -> types.SimpleNamespace:
    from . import _kernels as k

    return types.SimpleNamespace(
        spot_frame=k.spot_frame, spot_frame_planes=k.spot_frame_planes, gather=k.gather,
        gather_planes=k.gather_planes, annulus_rows=k.annulus_rows, clip_rows=k.clip_rows,
        aperture_sums=k.aperture_sums, noise_sums=k.noise_sums)


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
