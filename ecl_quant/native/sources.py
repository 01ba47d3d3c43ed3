"""The C sources of the compiled kernels and their hashes (used by setup.py at build time
and by :mod:`ecl_quant._jit` at load time; standard library only, so setup.py can load
this file without importing the package).

Every ``NAME.c`` here becomes the library ``ecl_quant._native_NAME``, built from
``NAME.c`` alone (it includes the headers; ``shell.h`` makes it a Python module).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

HERE = Path(__file__).resolve().parent


def libraries(folder: Path = HERE) -> list[str]:
    """Names of the kernel libraries (``NAME`` of each ``NAME.c``)."""
    return sorted(p.stem for p in folder.glob("*.c"))


def library_sources(name: str, folder: Path = HERE) -> list[Path]:
    """The files library ``name`` is built from: its source and the headers."""
    return [folder / f"{name}.c", *sorted(folder.glob("*.h"))]


def source_hash(name: str, folder: Path = HERE) -> str | None:
    """SHA-256 over the names and bytes of a library's sources; None when absent."""
    files = library_sources(name, folder)
    if not all(p.is_file() for p in files):
        return None
    h = hashlib.sha256()
    for p in files:
        h.update(p.name.encode())
        h.update(b"\0")
        h.update(p.read_bytes())
        h.update(b"\0")
    return h.hexdigest()
