"""Build of the optional compiled kernels (ecl_quant._native_*); everything else is in
pyproject.toml. Without a C compiler the build skips them and the package uses its
numpy code (the same numbers, slower)."""

import importlib.util
import sys
from pathlib import Path

from setuptools import Extension, setup

HERE = Path(__file__).resolve().parent
_spec = importlib.util.spec_from_file_location("_ecl_native_sources",
                                               HERE / "ecl_quant" / "native" / "sources.py")
_src = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_src)

# No fast-math and no contraction into fused multiply-adds: IEEE results, the same on
# every machine.
ARGS = (["/O2", "/fp:precise"] if sys.platform == "win32" else
        ["-O3", "-std=gnu99", "-ffp-contract=off", "-fvisibility=hidden"])


def _extension(name):
    files = [p.relative_to(HERE).as_posix() for p in _src.library_sources(name)]
    return Extension(
        f"ecl_quant._native_{name}", sources=[f for f in files if f.endswith(".c")],
        depends=[f for f in files if f.endswith(".h")], extra_compile_args=ARGS,
        define_macros=[("ECL_NATIVE_SOURCE_HASH", '"%s"' % _src.source_hash(name)),
                       ("ECL_MODULE_INIT", f"PyInit__native_{name}")],
        optional=True)


setup(ext_modules=[_extension(name) for name in _src.libraries()])
