/* Shared declarations of the compiled kernels (ecl_quant._native, loaded with ctypes). */
#ifndef ECL_NATIVE_H
#define ECL_NATIVE_H

#include <stddef.h>
#include <stdint.h>

#ifdef _WIN32
#define ECL_EXPORT __declspec(dllexport)
#else
#define ECL_EXPORT __attribute__((visibility("default")))
#endif

/* A 2-D plane of 8- or 16-bit samples with byte strides (any sign: rotated views). */
typedef struct {
    const char *data;  /* address of element [0, 0] */
    int64_t stride_row, stride_col;  /* bytes */
    int64_t rows, cols;
    int64_t itemsize;  /* 1 or 2 */
} ecl_plane;

#endif
