/* Per-frame kernels of the spot integrator (ecl_quant.curves.SpotIntegrator.add).
 *
 * One call does what the numpy path of SpotIntegrator.add does for a frame given as
 * codes: gather the aperture and annulus pixels' codes (from a crop of codes or
 * straight from the decoded planes) and their linear values, the weighted aperture
 * sums, the noise sums (level and squared second differences), a code histogram per
 * annulus and the iterated median / MAD clipping. The numpy code is the reference; the
 * tests compare both on the same frames. Loaded with ctypes by ecl_quant._jit.
 *
 * Arithmetic: float32 products (ap_w * value) summed in double, in four interleaved
 * partial sums (differs from a sequential sum by ~1e-16 relative); second differences
 * of float32 values in double (exact in any order). Everything else is IEEE double.
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "ecl_native.h"

/* ------------------------------------------------------------------ gather */

/* Code and value of every entry. Runs are (first entry, row, column, length) of
 * consecutive columns in one row of the crop; the crop starts at (r0, c0) of the
 * planes and the content is shifted by (dy, dx). Codes are luma[r, c] or, with a
 * chroma plane (paired: video red/blue), luma[r, c] * 256 + chroma[min(r >> sy_shift,
 * last row), min(c >> sx_shift, last column)] (the nearest chroma sample). */
ECL_EXPORT ECL_CLONES void ecl_gather(const char *luma, int64_t l_srow, int64_t l_scol,
                                      int64_t l_item, const char *chroma, int64_t c_srow,
                                      int64_t c_scol, int64_t c_rows, int64_t c_cols,
                                      int64_t r0, int64_t c0, int64_t sy_shift,
                                      int64_t sx_shift, const int64_t *runs, int64_t n_runs,
                                      int64_t dy, int64_t dx, const float *table,
                                      int32_t *keys, float *vals) {
    for (int64_t q = 0; q < n_runs; q++) {
        const int64_t e0 = runs[4 * q], n = runs[4 * q + 3];
        const int64_t r = r0 + runs[4 * q + 1] + dy;
        const int64_t c = c0 + runs[4 * q + 2] + dx;
        const char *y_row = luma + r * l_srow + c * l_scol;
        int32_t *restrict kk = keys + e0;
        float *restrict vv = vals + e0;
        if (chroma != NULL) {
            int64_t cr = r >> sy_shift;
            if (cr > c_rows - 1) cr = c_rows - 1;
            const char *c_row = chroma + cr * c_srow;
            if (l_scol == 1 && c_scol == 1 && c >= 0 && n > 0
                && ((c + n - 1) >> sx_shift) <= c_cols - 1) {
                /* contiguous samples, no chroma column past the last: no clamping */
                const uint8_t *yy = (const uint8_t *)y_row;
                const uint8_t *ch = (const uint8_t *)c_row;
                for (int64_t t = 0; t < n; t++) {
                    const int32_t k = ((int32_t)yy[t] << 8) | (int32_t)ch[(c + t) >> sx_shift];
                    kk[t] = k;
                    vv[t] = table[k];
                }
                continue;
            }
            for (int64_t t = 0; t < n; t++) {
                int64_t cc = (c + t) >> sx_shift;
                if (cc > c_cols - 1) cc = c_cols - 1;
                const int32_t y = *(const uint8_t *)(y_row + t * l_scol);
                const int32_t ch = *(const uint8_t *)(c_row + cc * c_scol);
                kk[t] = (y << 8) | ch;
            }
        } else if (l_item == 1) {
            for (int64_t t = 0; t < n; t++) kk[t] = *(const uint8_t *)(y_row + t * l_scol);
        } else {
            for (int64_t t = 0; t < n; t++) kk[t] = *(const uint16_t *)(y_row + t * l_scol);
        }
        for (int64_t t = 0; t < n; t++) vv[t] = table[kk[t]];
    }
}

/* ------------------------------------------------------------------ sums */

/* Four partial sums: lane k of a vector (GCC/Clang vector extensions; plain C
 * elsewhere) holds the terms i with i % 4 == k of a group, each in the order of i. The
 * same IEEE operations as the plain loop whatever the vector width. */
#if defined(__GNUC__)
typedef float ecl_v4f __attribute__((vector_size(16)));
typedef double ecl_v4d __attribute__((vector_size(32)));
#define ECL_VEC4 1
/* widened float32 values, and float32 products widened (macros: a vector return value
 * would depend on the instruction set's calling convention) */
#define LOAD4(dst, p)                                                                  \
    do {                                                                               \
        ecl_v4f f_;                                                                    \
        memcpy(&f_, (p), sizeof f_);                                                   \
        (dst) = __builtin_convertvector(f_, ecl_v4d);                                  \
    } while (0)
#define MUL4(dst, w, v)                                                                \
    do {                                                                               \
        ecl_v4f a_, b_;                                                                \
        memcpy(&a_, (w), sizeof a_);                                                   \
        memcpy(&b_, (v), sizeof b_);                                                   \
        (dst) = __builtin_convertvector(a_ * b_, ecl_v4d);                             \
    } while (0)
#endif

ECL_INLINE void aperture_sums(const float *vals, const float *w1, const float *w2,
                              const int64_t *starts, int64_t n, double *s1, double *s2) {
    for (int64_t g = 0; g < n; g++) {
        double a[4] = {0, 0, 0, 0}, b[4] = {0, 0, 0, 0};
        int64_t i = starts[g];
        const int64_t end = starts[g + 1];
#if defined(ECL_VEC4)
        ecl_v4d va = {0, 0, 0, 0}, vb = {0, 0, 0, 0};
        for (; i + 4 <= end; i += 4) {
            ecl_v4d p1, p2;
            MUL4(p1, w1 + i, vals + i);
            MUL4(p2, w2 + i, vals + i);
            va += p1;
            vb += p2;
        }
        for (int k = 0; k < 4; k++) {
            a[k] = va[k];
            b[k] = vb[k];
        }
#else
        for (; i + 4 <= end; i += 4) {
            for (int k = 0; k < 4; k++) {
                const float v = vals[i + k];
                a[k] += (double)(w1[i + k] * v);
                b[k] += (double)(w2[i + k] * v);
            }
        }
#endif
        for (; i < end; i++) {
            a[0] += (double)(w1[i] * vals[i]);
            b[0] += (double)(w2[i] * vals[i]);
        }
        s1[g] = (a[0] + a[1]) + (a[2] + a[3]);
        s2[g] = (b[0] + b[1]) + (b[2] + b[3]);
    }
}

/* Level of the middle frame (x1) and squared second differences x2 - 2 x1 + x0 per
 * group (x2: this frame's values). */
ECL_INLINE void noise_sums(const float *vals, const float *x0, const float *x1,
                           const int64_t *starts, int64_t m, double *lev, double *sq) {
    for (int64_t g = 0; g < m; g++) {
        double a[4] = {0, 0, 0, 0}, b[4] = {0, 0, 0, 0};
        int64_t i = starts[g];
        const int64_t end = starts[g + 1];
#if defined(ECL_VEC4)
        ecl_v4d va = {0, 0, 0, 0}, vb = {0, 0, 0, 0};
        for (; i + 4 <= end; i += 4) {
            ecl_v4d m1, v, z;
            LOAD4(m1, x1 + i);
            LOAD4(v, vals + i);
            LOAD4(z, x0 + i);
            const ecl_v4d d = v - m1 - m1 + z;
            va += m1;
            vb += d * d;
        }
        for (int k = 0; k < 4; k++) {
            a[k] = va[k];
            b[k] = vb[k];
        }
#else
        for (; i + 4 <= end; i += 4) {
            for (int k = 0; k < 4; k++) {
                const double m1 = (double)x1[i + k];
                const double d = (double)vals[i + k] - m1 - m1 + (double)x0[i + k];
                a[k] += m1;
                b[k] += d * d;
            }
        }
#endif
        for (; i < end; i++) {
            const double m1 = (double)x1[i];
            const double d = (double)vals[i] - m1 - m1 + (double)x0[i];
            a[0] += m1;
            b[0] += d * d;
        }
        lev[g] = (a[0] + a[1]) + (a[2] + a[3]);
        sq[g] = (b[0] + b[1]) + (b[2] + b[3]);
    }
}

/* ------------------------------------------------------------------ clipping */

typedef struct {
    double value;
    int64_t count;
} entry;

static int by_value(const void *pa, const void *pb) {
    const double a = ((const entry *)pa)->value, b = ((const entry *)pb)->value;
    return (a > b) - (a < b);
}

/* Iterated median / MAD clipping of rows of distinct ascending values with counts
 * (row g: values[off[g] .. off[g] + width[g]]), all rows in step, with the rules of
 * curves._clip_compact: at most 4 passes; keep every value within clip_sigma x 1.4826
 * MAD of the median; stop when nothing changes or a row would keep fewer than 3. The
 * kept values of a row are always a contiguous band [a, b), so order statistics come
 * from prefix counts and the distances' order from merging the two sides of the
 * median. Outputs per row: median (of the last pass), mean, SD (ddof 1), count. */
ECL_EXPORT int ecl_clip_rows(const double *values, const int64_t *counts,
                             const int64_t *off, const int64_t *width, int64_t n,
                             double clip_sigma, double *med, double *mean, double *sd,
                             int64_t *cnt) {
    int64_t total_w = 0;
    for (int64_t g = 0; g < n; g++) total_w += width[g] + 1;
    int64_t *pre = (int64_t *)malloc(sizeof(int64_t) * (size_t)(total_w > 0 ? total_w : 1));
    int64_t *band = (int64_t *)malloc(sizeof(int64_t) * (size_t)(5 * (n > 0 ? n : 1)));
    if (pre == NULL || band == NULL) {
        free(pre);
        free(band);
        return -1;
    }
    int64_t *a = band, *b = band + n, *na = band + 2 * n, *nb = band + 3 * n;
    int64_t *pre_off = band + 4 * n;
    /* prefix counts of row g: pre[pre_off[g] .. pre_off[g] + width[g]] */
    int64_t pos = 0;
    for (int64_t g = 0; g < n; g++) {
        pre_off[g] = pos;
        int64_t *p = pre + pos;
        p[0] = 0;
        for (int64_t j = 0; j < width[g]; j++) p[j + 1] = p[j] + counts[off[g] + j];
        a[g] = 0;
        b[g] = width[g];
        pos += width[g] + 1;
    }
    for (int iter = 0; iter < 4; iter++) {
        int changed = 0, too_few = 0;
        for (int64_t g = 0; g < n; g++) {
            const double *v = values + off[g];
            const int64_t *c = counts + off[g];
            const int64_t *p = pre + pre_off[g];
            const int64_t ag = a[g], bg = b[g];
            const int64_t base = p[ag];
            const int64_t total = p[bg] - base;
            int64_t lo = (total - 1) / 2, hi = total / 2;
            if (lo < 0) lo = 0;
            if (hi < 0) hi = 0;
            int64_t j_lo = ag;
            while (j_lo < bg - 1 && p[j_lo + 1] - base <= lo) j_lo++;
            int64_t j_hi = j_lo;
            while (j_hi < bg - 1 && p[j_hi + 1] - base <= hi) j_hi++;
            const double mg = 0.5 * (v[j_lo] + v[j_hi]);
            med[g] = mg;
            int64_t r = ag;
            while (r < bg && v[r] < mg) r++;
            int64_t left = r - 1;
            int64_t run = 0;
            double d_lo = INFINITY, d_hi = INFINITY;
            int got_lo = 0;
            while (left >= ag || r < bg) {
                double d;
                if (r < bg && (left < ag || v[r] - mg <= mg - v[left])) {
                    d = fabs(v[r] - mg);
                    run += c[r];
                    r++;
                } else {
                    d = fabs(v[left] - mg);
                    run += c[left];
                    left--;
                }
                if (!got_lo && run > lo) {
                    d_lo = d;
                    got_lo = 1;
                }
                if (run > hi) {
                    d_hi = d;
                    break;
                }
            }
            const double s = 1.482602218505602 * 0.5 * (d_lo + d_hi);
            const double limit = clip_sigma * s + 1e-30;
            int64_t x = 0;
            while (x < width[g] && !(fabs(v[x] - mg) <= limit)) x++;
            int64_t y = x;
            while (y < width[g] && fabs(v[y] - mg) <= limit) y++;
            na[g] = x;
            nb[g] = y;
            if (x != ag || y != bg) changed = 1;
            if (p[y] - p[x] < 3) too_few = 1;
        }
        if (!changed || too_few) break;
        for (int64_t g = 0; g < n; g++) {
            a[g] = na[g];
            b[g] = nb[g];
        }
    }
    for (int64_t g = 0; g < n; g++) {
        const double *v = values + off[g];
        const int64_t *c = counts + off[g];
        double w_sum = 0.0, v_sum = 0.0;
        for (int64_t j = a[g]; j < b[g]; j++) {
            w_sum += (double)c[j];
            v_sum += (double)c[j] * v[j];
        }
        const double cnt_f = w_sum > 1.0 ? w_sum : 1.0;
        const double mu = v_sum / cnt_f;
        double q = 0.0;
        for (int64_t j = a[g]; j < b[g]; j++) q += (double)c[j] * (v[j] - mu) * (v[j] - mu);
        mean[g] = mu;
        sd[g] = sqrt(q / (cnt_f - 1.0 > 1.0 ? cnt_f - 1.0 : 1.0));
        cnt[g] = (int64_t)w_sum > 1 ? (int64_t)w_sum : 1;
    }
    free(pre);
    free(band);
    return 0;
}

/* Each annulus (groups n .. 2n-1) as its distinct values, ascending, with counts: a
 * histogram of its codes over the frame's code range (paired codes: over the box of
 * both bytes), plus one entry per replaced pixel with its own value; then clipped.
 * gone_at (n_gone entries, ascending, distinct) and gone_group list the replaced
 * annulus entries and their groups. Returns 1, or 0 when the range is too wide for a
 * histogram (span x n > 4 x entries) or an annulus is empty or holds replaced pixels
 * only (the caller's numpy path then runs), -1 when out of memory. */
ECL_INLINE int annulus_stats(const int32_t *keys, const float *vals, const int64_t *gone_at,
                             const int64_t *gone_group, int64_t n_gone_all,
                             const int64_t *starts, int64_t n, int paired, const float *table,
                             double clip_sigma, double *med, double *mean, double *sd,
                             int64_t *cnt) {
    const int64_t b0 = starts[n], b1 = starts[2 * n];
    if (b1 <= b0) return 0;
    /* int32 running extremes (no branches): the loops vectorise */
    int32_t h_min = INT32_MAX, h_max = -1, l_min = INT32_MAX, l_max = -1;
    if (paired) {
        for (int64_t i = b0; i < b1; i++) {
            const int32_t h = keys[i] >> 8, l = keys[i] & 0xFF;
            h_min = h < h_min ? h : h_min;
            h_max = h > h_max ? h : h_max;
            l_min = l < l_min ? l : l_min;
            l_max = l > l_max ? l : l_max;
        }
    } else {
        for (int64_t i = b0; i < b1; i++) {
            const int32_t k = keys[i];
            h_min = k < h_min ? k : h_min;
            h_max = k > h_max ? k : h_max;
        }
        l_min = 0;
        l_max = 0;
    }
    const int64_t l_span = (int64_t)l_max - l_min + 1;
    const int64_t span = ((int64_t)h_max - h_min + 1) * l_span;
    if (span * n > 4 * (b1 - b0)) return 0;
    const int shift = paired ? 8 : 0;
    const int32_t mask = paired ? 0xFF : 0;
    const int64_t key_base = (int64_t)h_min * l_span + l_min;
    /* Four interleaved histograms: runs of equal codes (most of an annulus) would
     * otherwise wait on the previous increment of the same counter. */
    int32_t *hist = (int32_t *)calloc((size_t)(4 * n * span), sizeof(int32_t));
    int64_t *n_gone = (int64_t *)calloc((size_t)n, sizeof(int64_t));
    int64_t *width = (int64_t *)calloc((size_t)n, sizeof(int64_t));
    int64_t *off = (int64_t *)calloc((size_t)n, sizeof(int64_t));
    if (hist == NULL || n_gone == NULL || width == NULL || off == NULL) {
        free(hist);
        free(n_gone);
        free(width);
        free(off);
        return -1;
    }
    const int64_t hs = n * span;
    for (int64_t g = 0; g < n; g++) {
        int32_t *h = hist + g * span - key_base;
        int64_t i = starts[n + g];
        const int64_t end = starts[n + g + 1];
        for (; i + 4 <= end; i += 4) {
            for (int u = 0; u < 4; u++) {
                const int32_t k = keys[i + u];
                h[u * hs + (int64_t)(k >> shift) * l_span + (k & mask)] += 1;
            }
        }
        for (; i < end; i++) {
            const int32_t k = keys[i];
            h[(int64_t)(k >> shift) * l_span + (k & mask)] += 1;
        }
    }
    for (int64_t j = 0; j < hs; j++) hist[j] += hist[hs + j] + hist[2 * hs + j] + hist[3 * hs + j];
    for (int64_t j = 0; j < n_gone_all; j++) {
        const int64_t g = gone_group[j];
        const int32_t k = keys[gone_at[j]];
        hist[g * span - key_base + (int64_t)(k >> shift) * l_span + (k & mask)] -= 1;
        n_gone[g]++;
    }
    int status = 1;
    int64_t total = 0;
    for (int64_t g = 0; g < n; g++) {
        if (n_gone[g] >= starts[n + g + 1] - starts[n + g]) status = 0;
        int64_t m = n_gone[g];
        for (int64_t j = 0; j < span; j++) m += hist[g * span + j] > 0;
        width[g] = m;
        off[g] = total;
        total += m;
    }
    entry *rows = NULL;
    double *values = NULL;
    int64_t *counts = NULL;
    if (status == 1) {
        rows = (entry *)malloc(sizeof(entry) * (size_t)(total > 0 ? total : 1));
        values = (double *)malloc(sizeof(double) * (size_t)(total > 0 ? total : 1));
        counts = (int64_t *)malloc(sizeof(int64_t) * (size_t)(total > 0 ? total : 1));
        if (rows == NULL || values == NULL || counts == NULL) status = -1;
    }
    if (status == 1) {
        int64_t next_gone = 0; /* gone entries come in ascending order, so by group */
        for (int64_t g = 0; g < n; g++) {
            entry *row = rows + off[g];
            int64_t m = 0;
            for (int64_t j = 0; j < span; j++) {
                const int32_t c = hist[g * span + j];
                if (c > 0) {
                    const int64_t code = ((j / l_span + h_min) << shift) + (j % l_span) + l_min;
                    row[m].value = (double)table[code];
                    row[m].count = c;
                    m++;
                }
            }
            for (; next_gone < n_gone_all && gone_group[next_gone] == g; next_gone++) {
                row[m].value = (double)vals[gone_at[next_gone]];
                row[m].count = 1;
                m++;
            }
            qsort(row, (size_t)m, sizeof(entry), by_value);
            for (int64_t j = 0; j < m; j++) {
                values[off[g] + j] = row[j].value;
                counts[off[g] + j] = row[j].count;
            }
        }
        if (ecl_clip_rows(values, counts, off, width, n, clip_sigma, med, mean, sd, cnt) != 0)
            status = -1;
    }
    free(rows);
    free(values);
    free(counts);
    free(hist);
    free(n_gone);
    free(width);
    free(off);
    return status;
}

/* ------------------------------------------------------------------ one frame */

/* Everything SpotIntegrator.add needs from one frame (see the file comment). Groups:
 * starts[0 .. 2n] (apertures 0 .. n-1, then annuli); hits: entries whose value is
 * given (replaced hot pixels), hit_values their values. With with_noise, x0 and x1 are
 * the previous two frames' values of the same entries; paired: the codes are
 * Y' * 256 + C (from planes with a chroma plane, or a crop of such codes). Outputs:
 * vals (every entry), s1, s2 (weighted aperture sums), med, mean, sd, cnt (annulus
 * clipping), lev, sq (noise sums, 2n groups; untouched without with_noise), y_max
 * (highest first byte, Y' for video, of the aperture entries that keep their code).
 * Returns as annulus_stats. */
ECL_EXPORT ECL_CLONES int ecl_spot_frame(
    const char *luma, int64_t l_srow, int64_t l_scol, int64_t l_item, const char *chroma,
    int64_t c_srow, int64_t c_scol, int64_t c_rows, int64_t c_cols, int64_t r0, int64_t c0,
    int64_t sy_shift, int64_t sx_shift, const int64_t *runs, int64_t n_runs, int64_t dy,
    int64_t dx, const float *table, const int64_t *starts, int64_t n, const float *ap_w,
    const float *ap_w2, const int64_t *hit, const float *hit_values, int64_t n_hit,
    const float *x0, const float *x1, int with_noise, int paired, double clip_sigma,
    float *vals,
    double *s1, double *s2, double *med, double *mean, double *sd, int64_t *cnt,
    double *lev, double *sq, int64_t *y_max) {
    const int64_t n_pix = starts[2 * n], n_ap = starts[n];
    int32_t *keys = (int32_t *)malloc(sizeof(int32_t) * (size_t)(n_pix > 0 ? n_pix : 1));
    /* the replaced annulus entries, ascending and distinct, with their groups */
    int64_t *gone = (int64_t *)malloc(sizeof(int64_t) * (size_t)(2 * n_hit + 1));
    if (keys == NULL || gone == NULL) {
        free(keys);
        free(gone);
        return -1;
    }
    ecl_gather(luma, l_srow, l_scol, l_item, chroma, c_srow, c_scol, c_rows, c_cols, r0, c0,
               sy_shift, sx_shift, runs, n_runs, dy, dx, table, keys, vals);
    int64_t n_gone = 0;
    int sorted = 1;
    for (int64_t j = 0; j < n_hit; j++) {
        const int64_t i = hit[j];
        vals[i] = hit_values[j];
        if (j > 0 && i <= hit[j - 1]) sorted = 0;
        if (i >= n_ap) gone[n_gone++] = i;
    }
    if (!sorted && n_gone > 1) { /* ascending and distinct (insertion sort: few hits) */
        for (int64_t j = 1; j < n_gone; j++) {
            const int64_t v = gone[j];
            int64_t t = j - 1;
            while (t >= 0 && gone[t] > v) {
                gone[t + 1] = gone[t];
                t--;
            }
            gone[t + 1] = v;
        }
        int64_t u = 0;
        for (int64_t j = 0; j < n_gone; j++)
            if (u == 0 || gone[j] != gone[u - 1]) gone[u++] = gone[j];
        n_gone = u;
    }
    int64_t *gone_group = gone + n_hit;
    for (int64_t j = 0, g = n; j < n_gone; j++) {
        while (gone[j] >= starts[g + 1]) g++;
        gone_group[j] = g - n;
    }
    /* Replaced aperture entries keep no code: the highest code is of the others. */
    for (int64_t j = 0; j < n_hit; j++)
        if (hit[j] < n_ap) keys[hit[j]] = -1;
    int32_t ym = -1;
    for (int64_t i = 0; i < n_ap; i++) ym = keys[i] > ym ? keys[i] : ym;
    *y_max = (paired && ym >= 0) ? (ym >> 8) : ym;
    aperture_sums(vals, ap_w, ap_w2, starts, n, s1, s2);
    if (with_noise) noise_sums(vals, x0, x1, starts, 2 * n, lev, sq);
    const int status = annulus_stats(keys, vals, gone, gone_group, n_gone, starts, n, paired,
                                     table, clip_sigma, med, mean, sd, cnt);
    free(keys);
    free(gone);
    return status;
}

#include "shell.h"
