"""Atomic file output: write to a temporary file beside the target, then rename.

A reader never sees a half-written file, and an existing file is replaced only when the
new one is complete. Low-level OSErrors become :class:`~ecl_quant.errors.OutputError`.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

from .errors import OutputError

__all__ = ["to_jsonable", "atomic_write", "write_text_atomic", "write_json_atomic", "sha256_file", "ensure_dir",
           "check_overwrite", "figure_png"]

#: zlib level of the PNG plots. Measured on a 900 x 675 overlay of a noisy projection:
#: level 3 encodes in half the time of Pillow's default 6 and the file came out smaller
#: (596 vs 699 kB); a line plot grows by ~12 %.
PNG_COMPRESS_LEVEL = 3


def figure_png(fig: Any, *, dpi: float) -> bytes:
    """A Matplotlib figure as PNG bytes (rendered in memory; write them atomically)."""
    import io

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, pil_kwargs={"compress_level": PNG_COMPRESS_LEVEL})
    return buf.getvalue()


@contextlib.contextmanager
def atomic_write(path: str | Path, mode: str = "w", *, encoding: str | None = "utf-8") -> Iterator[IO[Any]]:
    """Open a temporary file for writing that replaces ``path`` on success.

    Parameters
    ----------
    path : str or Path
        Final destination.
    mode : {"w", "wb"}
        Text or binary.
    """
    path = Path(path)
    binary = "b" in mode
    _remove_stale_temps(path)
    try:
        # The writer's pid in the name lets a later write tell a dead writer's leftover
        # (a process killed between writing and renaming) from a live one's file.
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".tmp",
                                   dir=path.parent)
    except OSError as err:
        raise OutputError(f"cannot write here ({err.strerror}); choose another --out folder",
                          path=path.parent) from err
    try:
        # mkstemp creates 0600; give the final file the usual permissions (0666 & ~umask).
        os.chmod(tmp, 0o666 & ~_current_umask())
        with os.fdopen(fd, mode, encoding=None if binary else encoding) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as err:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise OutputError(f"writing failed ({err.strerror or err}); nothing was replaced",
                          path=path) from err
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # exists but not ours (EPERM), or cannot tell: keep its file
        return True
    return True


def _remove_stale_temps(path: Path) -> None:
    """Delete ``.NAME.<pid>.*.tmp`` files beside ``path`` whose writer is gone."""
    prefix = f".{path.name}."
    try:
        entries = list(os.scandir(path.parent))
    except OSError:
        return
    for entry in entries:
        name = entry.name
        if not (name.startswith(prefix) and name.endswith(".tmp")):
            continue
        pid_text = name[len(prefix):].split(".", 1)[0]
        if not pid_text.isdigit():
            continue  # not written by this scheme: leave it
        pid = int(pid_text)
        if pid != os.getpid() and not _pid_alive(pid):
            with contextlib.suppress(OSError):
                os.unlink(entry.path)


def _current_umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_text_atomic(path: str | Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically (UTF-8)."""
    with atomic_write(path, "w") as fh:
        fh.write(text)


def write_json_atomic(path: str | Path, obj: Any) -> None:
    """Write ``obj`` as indented JSON to ``path`` atomically."""
    write_text_atomic(path, json.dumps(obj, indent=2, sort_keys=False, default=_json_default) + "\n")


def to_jsonable(obj: Any, *, nonfinite_to_null: bool = True) -> Any:
    """A plain-JSON copy of ``obj``: dicts (string keys), lists, str, int, float, bool, None.

    numpy scalars and arrays become Python values and lists; any other object (Path,
    Fraction, ...) becomes its ``str``. Non-finite floats become None unless
    ``nonfinite_to_null`` is False (strict JSON has no NaN or Infinity).
    """
    import math

    import numpy as np

    if isinstance(obj, dict):
        return {str(k): to_jsonable(v, nonfinite_to_null=nonfinite_to_null) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v, nonfinite_to_null=nonfinite_to_null) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist(), nonfinite_to_null=nonfinite_to_null)
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float):
        return None if nonfinite_to_null and not math.isfinite(obj) else obj
    if isinstance(obj, (str, int, bool)) or obj is None:
        return obj
    return str(obj)


def _json_default(obj: Any) -> Any:
    import numpy as np

    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def sha256_file(path: str | Path, *, chunk_bytes: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk_bytes):
            h.update(block)
    return h.hexdigest()


def ensure_dir(path: str | Path) -> Path:
    """Create a folder (and parents); an OSError becomes OutputError."""
    path = Path(path)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise OutputError(f"cannot create folder ({err.strerror}); choose another --out "
                          "folder or check its permissions", path=path) from err
    if not os.access(path, os.W_OK):
        raise OutputError("folder is not writable; choose another --out", path=path)
    return path


def check_overwrite(paths: Any, *, force: bool) -> None:
    """Refuse to replace an existing output unless ``force`` (the CLI's ``--force``).

    Parameters
    ----------
    paths : iterable of str or Path
        The files a command is about to write.
    force : bool
        Replace them anyway.

    Raises
    ------
    OutputError
        For the first of ``paths`` that exists.
    """
    if force:
        return
    for p in paths:
        if Path(p).exists():
            raise OutputError("exists already; pass --force to replace it, or choose another "
                              "--out", path=p)
