/* Python module shell of one library of compiled kernels: included at the end of each
 * kernel source NAME.c, which is built alone as ecl_quant._native_NAME (setup.py defines
 * ECL_MODULE_INIT and ECL_NATIVE_SOURCE_HASH). The kernels are plain C functions that
 * ecl_quant._jit loads with ctypes; the module exists so that setuptools builds and
 * installs the library like any extension, and so that its file can be found. */
#ifndef ECL_SHELL_H
#define ECL_SHELL_H
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include "ecl_native.h"

#ifndef ECL_NATIVE_SOURCE_HASH
#define ECL_NATIVE_SOURCE_HASH "unknown"
#endif

/* SHA-256 of the C sources this library was built from (native/sources.py): the loader
 * refuses a library that is older than the sources beside it. */
ECL_EXPORT const char *ecl_native_source_hash(void) { return ECL_NATIVE_SOURCE_HASH; }

static struct PyModuleDef native_module = {
    PyModuleDef_HEAD_INIT, "ecl_quant native kernels",
    "Compiled per-frame kernels of ecl_quant, loaded with ctypes by ecl_quant._jit.", -1,
    NULL, NULL, NULL, NULL, NULL};

PyMODINIT_FUNC ECL_MODULE_INIT(void) { return PyModule_Create(&native_module); }

#endif
