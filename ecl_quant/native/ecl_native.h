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

/* The exported kernels are built twice where the compiler can pick one at load time
 * (GCC on x86-64 Linux, ifunc): for AVX2 and for the baseline instruction set. Only the
 * vector width differs: the same IEEE operations in the same order (no fused
 * multiply-adds: contraction is off), so both give the same bits. The helpers are
 * inlined into each. Define ECL_NO_CLONES to build the baseline alone. */
#if defined(__GNUC__) && !defined(__clang__) && defined(__x86_64__) && defined(__linux__) \
    && !defined(ECL_NO_CLONES)
#define ECL_CLONES __attribute__((target_clones("avx2", "default")))
#else
#define ECL_CLONES
#endif
#if defined(__GNUC__)
#define ECL_INLINE static inline __attribute__((always_inline))
#else
#define ECL_INLINE static __inline
#endif
#if defined(_MSC_VER) && !defined(restrict)
#define restrict __restrict
#endif

/* A 2-D plane of 8- or 16-bit samples with byte strides (any sign: rotated views). */
typedef struct {
    const char *data;  /* address of element [0, 0] */
    int64_t stride_row, stride_col;  /* bytes */
    int64_t rows, cols;
    int64_t itemsize;  /* 1 or 2 */
} ecl_plane;

#endif
