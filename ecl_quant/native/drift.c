/* Per-frame kernels of the drift tracker (ecl_quant.spots.DriftTracker), loaded with
 * ctypes by ecl_quant.spots (see _NativeDrift there). Each function does what the
 * OpenCV / numpy code of spots.py does, in the same order of float32 and float64
 * operations (ISO C, no contraction into fused multiply-adds), except where a comment
 * says otherwise; the tests compare both.
 *
 * Arrays are passed as addresses with their sizes; 2-D arrays are C-contiguous unless a
 * row stride (in bytes) is passed. Sample types: ECL_F32, ECL_U8, ECL_U16 below.
 * Functions that allocate return 0, or -1 when memory ran out. */
#include "ecl_native.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

enum { ECL_F32 = 0, ECL_U8 = 1, ECL_U16 = 2 };

#if defined(__SSE2__)
#include <emmintrin.h>
#endif

/* Row index of t in 0 .. h - 1 reflected at the borders (BORDER_REFLECT: -1 -> 0,
 * h -> h - 1), for -h <= t < 2 h. */
ECL_INLINE int64_t reflect(int64_t t, int64_t h) {
    if (t < 0) return -t - 1;
    if (t >= h) return 2 * h - t - 1;
    return t;
}

/* Python's a % n (n > 0): the result is never negative. */
ECL_INLINE int64_t py_mod(int64_t a, int64_t n) {
    int64_t m = a % n;
    return m < 0 ? m + n : m;
}

/* ------------------------------------------------------------------ downscaling */

/* 2 x 2 block means of an integer plane as float32: (a + b + c + d) * 0.25, as
 * cv2.resize INTER_AREA computes it on the float32 copy (exact below 2 ** 22). src has
 * rows stride_row bytes apart (columns contiguous); out is (oh, ow), contiguous. The four
 * are added as integers (v holds 2 ow) and the sum converted: the same float32 value as
 * adding the float32 codes, whose partial sums are whole numbers below 2 ** 24. */
#define DEFINE_HALVE(NAME, T)                                                            \
    ECL_INLINE void NAME(const char *src, int64_t stride_row, int64_t oh, int64_t ow,   \
                         float *restrict out, int32_t *restrict v) {                    \
        for (int64_t i = 0; i < oh; ++i) {                                              \
            const T *r0 = (const T *)(src + 2 * i * stride_row);                        \
            const T *r1 = (const T *)(src + (2 * i + 1) * stride_row);                  \
            float *o = out + i * ow;                                                    \
            for (int64_t j = 0; j < 2 * ow; ++j) v[j] = (int32_t)r0[j] + (int32_t)r1[j]; \
            for (int64_t j = 0; j < ow; ++j) o[j] = (float)(v[2 * j] + v[2 * j + 1]) * 0.25f; \
        }                                                                               \
    }
DEFINE_HALVE(halve_u8, uint8_t)
DEFINE_HALVE(halve_u16, uint16_t)

ECL_EXPORT ECL_CLONES int ecl_drift_halve_to_float(const void *src, int64_t kind,
                                                   int64_t stride_row, int64_t oh,
                                                   int64_t ow, float *out) {
    if (kind != ECL_U8 && kind != ECL_U16) return -2;
    int32_t *v = malloc(sizeof(int32_t) * (size_t)(2 * ow + 1));
    if (v == NULL) return -1;
    if (kind == ECL_U8)
        halve_u8((const char *)src, stride_row, oh, ow, out, v);
    else
        halve_u16((const char *)src, stride_row, oh, ow, out, v);
    free(v);
    return 0;
}

/* Two 2 x 2 steps of an integer plane in one pass: the first rounded half up to a whole
 * code ((a + b + c + d + 2) >> 2, cv2.resize INTER_AREA on integers), the second as the
 * sum of the four (4 times the exact mean). out is (oh, ow), contiguous, of type TO
 * (uint16 for 8-bit codes, uint32 for 16-bit ones: wide enough for sums of four), as
 * are the row buffers v0, v1 (4 ow) and t (2 ow). */
#define DEFINE_QUARTER(NAME, T, TO)                                                      \
    ECL_INLINE void NAME(const char *src, int64_t stride_row, int64_t oh, int64_t ow,   \
                         TO *restrict out, TO *restrict v0, TO *restrict v1,            \
                         TO *restrict t) {                                              \
        const int64_t w = 4 * ow;                                                       \
        for (int64_t i = 0; i < oh; ++i) {                                              \
            const T *r0 = (const T *)(src + 4 * i * stride_row);                        \
            const T *r1 = (const T *)(src + (4 * i + 1) * stride_row);                  \
            const T *r2 = (const T *)(src + (4 * i + 2) * stride_row);                  \
            const T *r3 = (const T *)(src + (4 * i + 3) * stride_row);                  \
            for (int64_t j = 0; j < w; ++j) {                                           \
                v0[j] = (TO)((TO)r0[j] + (TO)r1[j]);                                    \
                v1[j] = (TO)((TO)r2[j] + (TO)r3[j]);                                    \
            }                                                                           \
            for (int64_t j = 0; j < 2 * ow; ++j)                                        \
                t[j] = (TO)((TO)((TO)(v0[2 * j] + v0[2 * j + 1] + 2) >> 2)              \
                            + (TO)((TO)(v1[2 * j] + v1[2 * j + 1] + 2) >> 2));          \
            TO *o = out + i * ow;                                                       \
            for (int64_t m = 0; m < ow; ++m) o[m] = (TO)(t[2 * m] + t[2 * m + 1]);      \
        }                                                                               \
    }
DEFINE_QUARTER(quarter_u8, uint8_t, uint16_t)
DEFINE_QUARTER(quarter_u16, uint16_t, uint32_t)

#if defined(__SSE2__)
/* quarter_u8 on 32 columns at a time (8 outputs) with SSE2 integer operations: the same
 * whole-number arithmetic, so the same values; the columns left over as quarter_u8. */
ECL_INLINE __m128i pair_sums_u8(__m128i x) { /* x[2j] + x[2j + 1], 8 x 16 bits */
    const __m128i lo = _mm_set1_epi16(0x00FF);
    return _mm_add_epi16(_mm_and_si128(x, lo), _mm_srli_epi16(x, 8));
}
ECL_INLINE __m128i round_means(const char *a, const char *b, const char *c, const char *d) {
    /* the rounded 2 x 2 means of rows a, b (16 columns -> 8) plus those of rows c, d */
    const __m128i two = _mm_set1_epi16(2);
    const __m128i s01 = _mm_add_epi16(pair_sums_u8(_mm_loadu_si128((const __m128i *)a)),
                                      pair_sums_u8(_mm_loadu_si128((const __m128i *)b)));
    const __m128i s23 = _mm_add_epi16(pair_sums_u8(_mm_loadu_si128((const __m128i *)c)),
                                      pair_sums_u8(_mm_loadu_si128((const __m128i *)d)));
    return _mm_add_epi16(_mm_srli_epi16(_mm_add_epi16(s01, two), 2),
                         _mm_srli_epi16(_mm_add_epi16(s23, two), 2));
}
ECL_INLINE void quarter_u8_sse2(const char *src, int64_t stride_row, int64_t oh, int64_t ow,
                                uint16_t *restrict out) {
    const __m128i one = _mm_set1_epi16(1);
    for (int64_t i = 0; i < oh; ++i) {
        const char *r0 = src + 4 * i * stride_row, *r1 = r0 + stride_row;
        const char *r2 = r1 + stride_row, *r3 = r2 + stride_row;
        uint16_t *o = out + i * ow;
        int64_t m = 0;
        for (; m + 8 <= ow; m += 8) {
            const int64_t j = 4 * m;
            const __m128i t0 = round_means(r0 + j, r1 + j, r2 + j, r3 + j);
            const __m128i t1 = round_means(r0 + j + 16, r1 + j + 16, r2 + j + 16, r3 + j + 16);
            /* t[2 k] + t[2 k + 1] (at most 4 x 255: no saturation) */
            const __m128i u = _mm_packs_epi32(_mm_madd_epi16(t0, one), _mm_madd_epi16(t1, one));
            _mm_storeu_si128((__m128i *)(o + m), u);
        }
        for (; m < ow; ++m) {
            const int64_t j = 4 * m;
            uint16_t t = 0;
            for (int half = 0; half < 2; ++half) {
                const int64_t c = j + 2 * half;
                const uint16_t a = (uint16_t)((uint8_t)r0[c] + (uint8_t)r0[c + 1]
                                              + (uint8_t)r1[c] + (uint8_t)r1[c + 1] + 2) >> 2;
                const uint16_t b = (uint16_t)((uint8_t)r2[c] + (uint8_t)r2[c + 1]
                                              + (uint8_t)r3[c] + (uint8_t)r3[c + 1] + 2) >> 2;
                t = (uint16_t)(t + a + b);
            }
            o[m] = t;
        }
    }
}
#endif

ECL_EXPORT ECL_CLONES int ecl_drift_quarter_sums(const void *src, int64_t kind,
                                                 int64_t stride_row, int64_t oh, int64_t ow,
                                                 void *out) {
    if (kind != ECL_U8 && kind != ECL_U16) return -2;
#if defined(__SSE2__)
    if (kind == ECL_U8) { /* needs no row buffers */
        quarter_u8_sse2((const char *)src, stride_row, oh, ow, (uint16_t *)out);
        return 0;
    }
#endif
    uint32_t *buf = malloc(sizeof(uint32_t) * (size_t)(10 * ow + 1));
    if (buf == NULL) return -1;
    if (kind == ECL_U8) {
        uint16_t *b = (uint16_t *)buf;
        quarter_u8((const char *)src, stride_row, oh, ow, (uint16_t *)out, b, b + 4 * ow,
                   b + 8 * ow);
    } else {
        quarter_u16((const char *)src, stride_row, oh, ow, (uint32_t *)out, buf,
                    buf + 4 * ow, buf + 8 * ow);
    }
    free(buf);
    return 0;
}

/* ------------------------------------------------------------------ box blurs */

/* dst = inv times the sums over rows i - r .. i + r (BORDER_REFLECT, r < h) of src, as
 * float32: running sums in float64 per column (cv2.blur with a (1, 2 r + 1) kernel and
 * inv = 1 / (2 r + 1), vectorised over each row). acc holds w doubles. */
#define DEFINE_BOX(NAME, T)                                                              \
    ECL_INLINE void NAME(const T *restrict src, int64_t h, int64_t w, int64_t r, double inv, \
                     double *restrict acc, float *restrict dst) {                       \
        for (int64_t j = 0; j < w; ++j) acc[j] = 0.0;                                   \
        for (int64_t t = -r; t <= r; ++t) {                                             \
            const T *row = src + (t < 0 ? -t - 1 : t) * w;                              \
            for (int64_t j = 0; j < w; ++j) acc[j] += row[j];                           \
        }                                                                               \
        for (int64_t i = 0; i < h; ++i) {                                               \
            float *o = dst + i * w;                                                     \
            for (int64_t j = 0; j < w; ++j) o[j] = (float)(acc[j] * inv);               \
            const T *ra = src + reflect(i + r + 1, h) * w;                              \
            const T *rb = src + reflect(i - r, h) * w;                                  \
            for (int64_t j = 0; j < w; ++j) acc[j] += (double)ra[j] - (double)rb[j];    \
        }                                                                               \
    }
DEFINE_BOX(box_f32, float)
DEFINE_BOX(box_u16, uint16_t)

/* Twice the box mean over rows (see DEFINE_BOX) of src times scale: the first pass with
 * inv = scale / (2 r + 1), the second with 1 / (2 r + 1). src (h, w) is float32 or
 * uint16; out (h, w) float32. */
ECL_EXPORT ECL_CLONES int ecl_drift_box_down_twice(const void *src, int64_t kind, int64_t h, int64_t w,
                                        int64_t r, double scale, float *out) {
    if (kind != ECL_F32 && kind != ECL_U16) return -2;
    float *tmp = malloc(sizeof(float) * (size_t)(h * w) + 1);
    double *acc = malloc(sizeof(double) * (size_t)w + 1);
    if (tmp == NULL || acc == NULL) {
        free(tmp);
        free(acc);
        return -1;
    }
    double inv = scale / (double)(2 * r + 1);
    if (kind == ECL_F32)
        box_f32((const float *)src, h, w, r, inv, acc, tmp);
    else
        box_u16((const uint16_t *)src, h, w, r, inv, acc, tmp);
    box_f32(tmp, h, w, r, 1.0 / (double)(2 * r + 1), acc, out);
    free(tmp);
    free(acc);
    return 0;
}

/* Exact int32 sums over rows i - r .. i + r (BORDER_REFLECT, r < h) of src. */
#define DEFINE_BOX_SUMS(NAME, T)                                                         \
    ECL_INLINE void NAME(const T *restrict src, int64_t h, int64_t w, int64_t r,             \
                     int32_t *restrict acc, int32_t *restrict dst) {                    \
        for (int64_t j = 0; j < w; ++j) acc[j] = 0;                                     \
        for (int64_t t = -r; t <= r; ++t) {                                             \
            const T *row = src + (t < 0 ? -t - 1 : t) * w;                              \
            for (int64_t j = 0; j < w; ++j) acc[j] += (int32_t)row[j];                  \
        }                                                                               \
        for (int64_t i = 0; i < h; ++i) {                                               \
            int32_t *o = dst + i * w;                                                   \
            for (int64_t j = 0; j < w; ++j) o[j] = acc[j];                              \
            const T *ra = src + reflect(i + r + 1, h) * w;                              \
            const T *rb = src + reflect(i - r, h) * w;                                  \
            for (int64_t j = 0; j < w; ++j) acc[j] += (int32_t)ra[j] - (int32_t)rb[j];  \
        }                                                                               \
    }
DEFINE_BOX_SUMS(box_sums_u16, uint16_t)
DEFINE_BOX_SUMS(box_sums_i32, int32_t)

/* ecl_drift_box_down_twice of uint16 codes as exact int32 sums, not divided (src times
 * (2 r + 1) ** 2 must fit in int32). */
ECL_EXPORT ECL_CLONES int ecl_drift_box_sums_down2(const uint16_t *src, int64_t h, int64_t w, int64_t r,
                                        int32_t *out) {
    int32_t *tmp = malloc(sizeof(int32_t) * (size_t)(h * w) + 1);
    int32_t *acc = malloc(sizeof(int32_t) * (size_t)w + 1);
    if (tmp == NULL || acc == NULL) {
        free(tmp);
        free(acc);
        return -1;
    }
    box_sums_u16(src, h, w, r, acc, tmp);
    box_sums_i32(tmp, h, w, r, acc, out);
    free(tmp);
    free(acc);
    return 0;
}

/* ------------------------------------------------------------------ high-pass */

/* The end of the high-pass: out = med * float32(scale) - blur, where blur is the
 * running box over rows of tmp (float32 rows times inv, or exact int32 sums times c, in
 * float64, each rounded once to float32), with the column sums of out and of its
 * squares in float64 (sequential over rows, then over columns): moments[0], [1]. With a
 * window, out becomes (out - float32(mean)) * window, in float32. */
#define DEFINE_REST(NAME, TM, TT, ACC)                                                   \
    ECL_INLINE void NAME(const TT *restrict tmp, const TM *restrict med, int64_t h,          \
                     int64_t w, int64_t r, double c, float sc,                          \
                     const float *restrict window, ACC *restrict acc,                   \
                     double *restrict s1, double *restrict s2, float *restrict out,     \
                     double *restrict moments) {                                        \
        for (int64_t j = 0; j < w; ++j) {                                               \
            acc[j] = 0;                                                                 \
            s1[j] = 0.0;                                                                \
            s2[j] = 0.0;                                                                \
        }                                                                               \
        for (int64_t t = -r; t <= r; ++t) {                                             \
            const TT *row = tmp + (t < 0 ? -t - 1 : t) * w;                             \
            for (int64_t j = 0; j < w; ++j) acc[j] += row[j];                           \
        }                                                                               \
        for (int64_t i = 0; i < h; ++i) {                                               \
            const TM *a = med + i * w;                                                  \
            float *o = out + i * w;                                                     \
            for (int64_t j = 0; j < w; ++j) {                                           \
                float v = (float)a[j] * sc - (float)((double)acc[j] * c);               \
                o[j] = v;                                                               \
                s1[j] += v;                                                             \
                s2[j] += (double)v * v;                                                 \
            }                                                                           \
            const TT *ra = tmp + reflect(i + r + 1, h) * w;                             \
            const TT *rb = tmp + reflect(i - r, h) * w;                                 \
            for (int64_t j = 0; j < w; ++j) acc[j] += (ACC)ra[j] - (ACC)rb[j];          \
        }                                                                               \
        double t1 = 0.0, t2 = 0.0;                                                      \
        for (int64_t j = 0; j < w; ++j) t1 += s1[j];                                    \
        for (int64_t j = 0; j < w; ++j) t2 += s2[j];                                    \
        moments[0] = t1;                                                                \
        moments[1] = t2;                                                                \
        if (window != NULL) {                                                           \
            float m = (float)(t1 / (double)(h * w));                                    \
            for (int64_t k = 0; k < h * w; ++k) out[k] = (out[k] - m) * window[k];      \
        }                                                                               \
    }
DEFINE_REST(rest_f32_f32, float, float, double)
DEFINE_REST(rest_u16_f32, uint16_t, float, double)
DEFINE_REST(rest_u16_i32, uint16_t, int32_t, int32_t)

/* med (h, w; float32 or uint16) times scale minus the vertical part of the double box
 * blur of low_h (float32, its horizontal part already applied), with the sum and the sum
 * of squares of the result (moments, 2 doubles); window (h, w) float32 or NULL. */
ECL_EXPORT ECL_CLONES int ecl_drift_highpass_rest(const float *low_h, const void *med, int64_t med_kind,
                                       int64_t h, int64_t w, int64_t r, const float *window,
                                       double scale, float *out, double *moments) {
    if (med_kind != ECL_F32 && med_kind != ECL_U16) return -2;
    float *tmp = malloc(sizeof(float) * (size_t)(h * w) + 1);
    double *acc = malloc(sizeof(double) * (size_t)(3 * w) + 1);
    if (tmp == NULL || acc == NULL) {
        free(tmp);
        free(acc);
        return -1;
    }
    double inv = 1.0 / (double)(2 * r + 1);
    box_f32(low_h, h, w, r, inv, acc, tmp); /* first pass, as ecl_drift_box_down_twice */
    if (med_kind == ECL_F32)
        rest_f32_f32(tmp, (const float *)med, h, w, r, inv, (float)scale, window, acc,
                     acc + w, acc + 2 * w, out, moments);
    else
        rest_u16_f32(tmp, (const uint16_t *)med, h, w, r, inv, (float)scale, window, acc,
                     acc + w, acc + 2 * w, out, moments);
    free(tmp);
    free(acc);
    return 0;
}

/* ecl_drift_highpass_rest for uint16 codes: sums_h (h, w int32) are the exact horizontal
 * box sums, the vertical ones are exact too, and the blur is their total times
 * scale / (2 r + 1) ** 4, rounded once to float32. */
ECL_EXPORT ECL_CLONES int ecl_drift_highpass_sums_rest(const int32_t *sums_h, const uint16_t *med,
                                            int64_t h, int64_t w, int64_t r,
                                            const float *window, double scale, float *out,
                                            double *moments) {
    int32_t *tmp = malloc(sizeof(int32_t) * (size_t)(h * w) + 1);
    int32_t *acc = malloc(sizeof(int32_t) * (size_t)w + 1);
    double *s = malloc(sizeof(double) * (size_t)(2 * w) + 1);
    if (tmp == NULL || acc == NULL || s == NULL) {
        free(tmp);
        free(acc);
        free(s);
        return -1;
    }
    const int64_t k = 2 * r + 1;
    const double c = scale / (double)(k * k * k * k);
    box_sums_i32(sums_h, h, w, r, acc, tmp);
    rest_u16_i32(tmp, med, h, w, r, c, (float)scale, window, acc, s, s + w, out, moments);
    free(tmp);
    free(acc);
    free(s);
    return 0;
}

/* ------------------------------------------------------------------ phase correlation */

/* spec * conj(ref) and its normalised form P |P| / (|P|^2 + eps), for n complex64
 * values stored as (re, im) float32 pairs, in float32 as numpy computes it (|P| is the
 * correctly rounded square root of re^2 + im^2, as numpy's abs of complex64 for these
 * finite values). With AVX eight and with SSE2 four values at a time (sqrtf does not
 * vectorise while it may set errno; _mm_sqrt_ps is the same IEEE square root), the
 * same operations on each value. */
#if defined(__GNUC__) && defined(__x86_64__)
#include <immintrin.h>
#define ECL_AVX_CROSS 1
/* The loop of ecl_drift_cross_power below eight values at a time (AVX: the square
 * roots and divisions, the costly part, twice as wide); returns how many were done.
 * The shuffles work within each 128-bit half, and the unpacks undo them. */
__attribute__((target("avx"))) static int64_t cross_power_avx(const float *spec,
                                                              const float *ref, int64_t n,
                                                              float e, float *cross,
                                                              float *norm) {
    const __m256 ev = _mm256_set1_ps(e);
    const __m256 sign = _mm256_set1_ps(-0.0f);
    int64_t k = 0;
    for (; k + 8 <= n; k += 8) {
        __m256 a0 = _mm256_loadu_ps(spec + 2 * k), a1 = _mm256_loadu_ps(spec + 2 * k + 8);
        __m256 b0 = _mm256_loadu_ps(ref + 2 * k), b1 = _mm256_loadu_ps(ref + 2 * k + 8);
        __m256 ar = _mm256_shuffle_ps(a0, a1, _MM_SHUFFLE(2, 0, 2, 0));
        __m256 ai = _mm256_shuffle_ps(a0, a1, _MM_SHUFFLE(3, 1, 3, 1));
        __m256 br = _mm256_shuffle_ps(b0, b1, _MM_SHUFFLE(2, 0, 2, 0));
        __m256 bi = _mm256_xor_ps(_mm256_shuffle_ps(b0, b1, _MM_SHUFFLE(3, 1, 3, 1)), sign);
        __m256 re = _mm256_sub_ps(_mm256_mul_ps(ar, br), _mm256_mul_ps(ai, bi));
        __m256 im = _mm256_add_ps(_mm256_mul_ps(ar, bi), _mm256_mul_ps(ai, br));
        __m256 m = _mm256_sqrt_ps(_mm256_add_ps(_mm256_mul_ps(re, re), _mm256_mul_ps(im, im)));
        __m256 f = _mm256_div_ps(m, _mm256_add_ps(_mm256_mul_ps(m, m), ev));
        _mm256_storeu_ps(cross + 2 * k, _mm256_unpacklo_ps(re, im));
        _mm256_storeu_ps(cross + 2 * k + 8, _mm256_unpackhi_ps(re, im));
        __m256 yr = _mm256_mul_ps(re, f), yi = _mm256_mul_ps(im, f);
        _mm256_storeu_ps(norm + 2 * k, _mm256_unpacklo_ps(yr, yi));
        _mm256_storeu_ps(norm + 2 * k + 8, _mm256_unpackhi_ps(yr, yi));
    }
    return k;
}
#endif

ECL_EXPORT ECL_CLONES int ecl_drift_cross_power(const float *spec, const float *ref,
                                                int64_t n, double eps, float *cross,
                                                float *norm) {
    const float e = (float)eps;
    int64_t k = 0;
#if defined(ECL_AVX_CROSS)
    __builtin_cpu_init();
    if (__builtin_cpu_supports("avx")) k = cross_power_avx(spec, ref, n, e, cross, norm);
#endif
#if defined(__SSE2__)
    const __m128 ev = _mm_set1_ps(e);
    const __m128 sign = _mm_set1_ps(-0.0f);
    for (; k + 4 <= n; k += 4) {
        __m128 a0 = _mm_loadu_ps(spec + 2 * k), a1 = _mm_loadu_ps(spec + 2 * k + 4);
        __m128 b0 = _mm_loadu_ps(ref + 2 * k), b1 = _mm_loadu_ps(ref + 2 * k + 4);
        __m128 ar = _mm_shuffle_ps(a0, a1, _MM_SHUFFLE(2, 0, 2, 0));
        __m128 ai = _mm_shuffle_ps(a0, a1, _MM_SHUFFLE(3, 1, 3, 1));
        __m128 br = _mm_shuffle_ps(b0, b1, _MM_SHUFFLE(2, 0, 2, 0));
        __m128 bi = _mm_xor_ps(_mm_shuffle_ps(b0, b1, _MM_SHUFFLE(3, 1, 3, 1)), sign);
        __m128 re = _mm_sub_ps(_mm_mul_ps(ar, br), _mm_mul_ps(ai, bi));
        __m128 im = _mm_add_ps(_mm_mul_ps(ar, bi), _mm_mul_ps(ai, br));
        __m128 m = _mm_sqrt_ps(_mm_add_ps(_mm_mul_ps(re, re), _mm_mul_ps(im, im)));
        __m128 f = _mm_div_ps(m, _mm_add_ps(_mm_mul_ps(m, m), ev));
        _mm_storeu_ps(cross + 2 * k, _mm_unpacklo_ps(re, im));
        _mm_storeu_ps(cross + 2 * k + 4, _mm_unpackhi_ps(re, im));
        __m128 yr = _mm_mul_ps(re, f), yi = _mm_mul_ps(im, f);
        _mm_storeu_ps(norm + 2 * k, _mm_unpacklo_ps(yr, yi));
        _mm_storeu_ps(norm + 2 * k + 4, _mm_unpackhi_ps(yr, yi));
    }
#endif
    for (; k < n; ++k) {
        float ar = spec[2 * k], ai = spec[2 * k + 1];
        float br = ref[2 * k], bi = -ref[2 * k + 1];
        float re = ar * br - ai * bi;
        float im = ar * bi + ai * br;
        cross[2 * k] = re;
        cross[2 * k + 1] = im;
        float m = sqrtf(re * re + im * im);
        float f = m / (m * m + e);
        norm[2 * k] = re * f;
        norm[2 * k + 1] = im * f;
    }
    return 0;
}

/* Sum of the 5 x 5 samples around (py, px) of a periodic surface c (rows, cols float32),
 * and its first moments along the rows and the columns (offsets -2 .. 2), in float64:
 * out[0 .. 2] = total, row moment, column moment. */
ECL_EXPORT void ecl_drift_peak_box(const float *c, int64_t rows, int64_t cols, int64_t py,
                                   int64_t px, double *out) {
    double total = 0.0, my = 0.0, mx = 0.0;
    for (int64_t dy = -2; dy < 3; ++dy) {
        const float *row = c + py_mod(py + dy, rows) * cols;
        for (int64_t dx = -2; dx < 3; ++dx) {
            double v = (double)row[py_mod(px + dx, cols)];
            total += v;
            my += (double)dy * v;
            mx += (double)dx * v;
        }
    }
    out[0] = total;
    out[1] = my;
    out[2] = mx;
}

/* The sums of spots._spectral_lags: cross (h, 2 wc) is the float32 view (re, im
 * interleaved) of the complex64 cross spectrum, wy (h), wx (wc) the weights of its rows
 * and columns; the tables hold cos / sin(2 pi n / N) for N = cols (cos_x, sin_x) and
 * N = rows (cos_y, sin_y). out (3 x 3) gets the correlation at the lags
 * (ix + i - 1, iy + j - 1) in out[3 j + i], divided by rows * cols. Sums along a row in
 * float32 (in LANES interleaved partial sums, added at the end: the order is not numpy's
 * sequential one), over rows in float64. */
#define LANES 8
#if defined(__GNUC__)
typedef float ecl_v8f __attribute__((vector_size(4 * LANES)));
#endif
ECL_EXPORT ECL_CLONES int ecl_drift_spectral_lags(const float *cross, int64_t h, int64_t wc,
                                       const double *wy, const double *wx, int64_t ix,
                                       int64_t iy, const double *cos_x, const double *sin_x,
                                       int64_t cols, const double *cos_y,
                                       const double *sin_y, int64_t rows, double *out) {
    float *buf = malloc(sizeof(float) * (size_t)(8 * wc) + 1);
    if (buf == NULL) return -1;
    float *cx = buf, *sx = buf + 3 * wc, *re = buf + 6 * wc, *im = buf + 7 * wc;
    for (int d = 0; d < 3; ++d) {
        const int64_t step = py_mod(ix + d - 1, cols);
        int64_t t = 0; /* (k * step) % cols, without a division per k */
        for (int64_t k = 0; k < wc; ++k) {
            cx[d * wc + k] = (float)(cos_x[t] * wx[k]);
            sx[d * wc + k] = (float)(sin_x[t] * wx[k]);
            t += step;
            if (t >= cols) t -= cols;
        }
    }
    double acc[9] = {0.0};
    int64_t step_y[3], t_y[3] = {0, 0, 0}; /* t_y[e] = (ky * step_y[e]) % rows */
    for (int e = 0; e < 3; ++e) step_y[e] = py_mod(iy + e - 1, rows);
    for (int64_t ky = 0; ky < h; ++ky) {
        const float *row = cross + ky * 2 * wc;
        for (int64_t k = 0; k < wc; ++k) {
            re[k] = row[2 * k];
            im[k] = row[2 * k + 1];
        }
        for (int d = 0; d < 3; ++d) {
            const float *c = cx + d * wc, *s = sx + d * wc;
            float pr[LANES] = {0.0f}, pi[LANES] = {0.0f};
            int64_t k = 0;
#if defined(__GNUC__)
            /* the lanes as one vector (GCC / clang vector extension): the same sums */
            ecl_v8f vr = {0.0f}, vi = {0.0f};
            for (; k + LANES <= wc; k += LANES) {
                ecl_v8f a, b, cc, ss;
                memcpy(&a, re + k, sizeof a);
                memcpy(&b, im + k, sizeof b);
                memcpy(&cc, c + k, sizeof cc);
                memcpy(&ss, s + k, sizeof ss);
                vr += a * cc - b * ss;
                vi += a * ss + b * cc;
            }
            for (int l = 0; l < LANES; ++l) {
                pr[l] = vr[l];
                pi[l] = vi[l];
            }
#else
            for (; k + LANES <= wc; k += LANES)
                for (int l = 0; l < LANES; ++l) {
                    pr[l] += re[k + l] * c[k + l] - im[k + l] * s[k + l];
                    pi[l] += re[k + l] * s[k + l] + im[k + l] * c[k + l];
                }
#endif
            float rr = 0.0f, ii = 0.0f;
            for (int l = 0; l < LANES; ++l) {
                rr += pr[l];
                ii += pi[l];
            }
            for (; k < wc; ++k) {
                rr += re[k] * c[k] - im[k] * s[k];
                ii += re[k] * s[k] + im[k] * c[k];
            }
            for (int e = 0; e < 3; ++e) {
                const int64_t t = t_y[e];
                acc[3 * e + d] += wy[ky] * ((double)rr * cos_y[t] - (double)ii * sin_y[t]);
            }
        }
        for (int e = 0; e < 3; ++e) {
            t_y[e] += step_y[e];
            if (t_y[e] >= rows) t_y[e] -= rows;
        }
    }
    const double size = (double)(rows * cols);
    for (int q = 0; q < 9; ++q) out[q] = acc[q] / size;
    free(buf);
    return 0;
}

/* ------------------------------------------------------------------ interleaved */

/* One channel of a pixel-interleaved integer image, 2 x 2 block means rounded to a
 * whole code as cv2.resize INTER_AREA rounds them ((a + b + c + d + 2) >> 2): the first
 * downscale step of an RGB still, without copying the channel out first. src: the
 * channel's sample [0, 0]; stride_row and stride_px in bytes; out: oh x ow contiguous,
 * same type. */
ECL_EXPORT ECL_CLONES int ecl_drift_halve_channel(const void *src, int64_t kind,
                                                  int64_t stride_row, int64_t stride_px,
                                                  int64_t oh, int64_t ow, void *out) {
    const char *base = (const char *)src;
    if (kind == ECL_U8) {
        for (int64_t i = 0; i < oh; ++i) {
            const unsigned char *r0 = (const unsigned char *)(base + 2 * i * stride_row);
            const unsigned char *r1 = (const unsigned char *)(base + (2 * i + 1) * stride_row);
            uint8_t *o = (uint8_t *)out + i * ow;
            for (int64_t j = 0; j < ow; ++j) {
                const int64_t a = 2 * j * stride_px, b = a + stride_px;
                o[j] = (uint8_t)((r0[a] + r0[b] + r1[a] + r1[b] + 2) >> 2);
            }
        }
        return 0;
    }
    if (kind == ECL_U16) {
        for (int64_t i = 0; i < oh; ++i) {
            const char *r0 = base + 2 * i * stride_row;
            const char *r1 = base + (2 * i + 1) * stride_row;
            uint16_t *o = (uint16_t *)out + i * ow;
            for (int64_t j = 0; j < ow; ++j) {
                const int64_t a = 2 * j * stride_px, b = a + stride_px;
                const uint32_t sum = (uint32_t)*(const uint16_t *)(r0 + a)
                                     + *(const uint16_t *)(r0 + b)
                                     + *(const uint16_t *)(r1 + a)
                                     + *(const uint16_t *)(r1 + b);
                o[j] = (uint16_t)((sum + 2) >> 2);
            }
        }
        return 0;
    }
    return -2;
}

#include "shell.h"
