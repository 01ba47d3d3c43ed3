"""Compiled per-frame kernels of the spot integrator (numba; see :mod:`ecl_quant._jit`).

Imported only through :func:`ecl_quant._jit.kernels`: importing numba costs about half a
second. Every kernel is a module-level function with ``cache=True``, so compiled code is
stored on disk and loaded by later processes (numba cannot cache nested functions that
call other kernels).
"""

from __future__ import annotations

from typing import Any

import numba
import numpy as np


# Sums may be reassociated (vectorised): float32 terms summed in float64 differ from
# a sequential sum by ~1e-16 relative. Everything else keeps IEEE semantics (the
# clipping compares against +inf padding).
summing = numba.njit(cache=True, nogil=True, fastmath={"reassoc", "nsz"})
plain = numba.njit(cache=True, nogil=True)


@summing
def aperture_sums(vals: Any, ap_w: Any, ap_w2: Any, starts: Any, n: int) -> Any:
    s1 = np.zeros(n)
    s2 = np.zeros(n)
    for g in range(n):
        a1 = 0.0
        a2 = 0.0
        for i in range(starts[g], starts[g + 1]):
            a1 += np.float64(ap_w[i] * vals[i])
            a2 += np.float64(ap_w2[i] * vals[i])
        s1[g] = a1
        s2[g] = a2
    return s1, s2


@summing
def noise_sums(vals: Any, x0: Any, x1: Any, starts: Any) -> Any:
    # Level (of the middle frame) and squared second differences per group. The
    # difference x2 - 2 x1 + x0 of float32 values is exact in float64 in any order
    # of the terms, as in the numpy path.
    m = starts.size - 1
    lev = np.zeros(m)
    sq = np.zeros(m)
    for g in range(m):
        a_l = 0.0
        a_q = 0.0
        for i in range(starts[g], starts[g + 1]):
            m1 = np.float64(x1[i])
            d = np.float64(vals[i]) - m1 - m1 + np.float64(x0[i])
            a_l += m1
            a_q += d * d
        lev[g] = a_l
        sq[g] = a_q
    return lev, sq


@plain
def clip_rows(cv: Any, cc: Any, width: Any, clip_sigma: float) -> Any:
    # Iterated median / MAD clipping of rows of distinct ascending values with counts
    # (row g: cv[g, :width[g]]), all rows in step, with the rules of
    # curves._clip_compact. The kept values of a row are always a contiguous run
    # [a, b) (a band around the median), so order statistics are read off prefix
    # counts and the distances' order comes from merging the two sides of the
    # median outward: no sort.
    n = cv.shape[0]
    m_max = cv.shape[1]
    pre = np.zeros((n, m_max + 1), np.int64)
    for g in range(n):
        for j in range(width[g]):
            pre[g, j + 1] = pre[g, j] + cc[g, j]
    a = np.zeros(n, np.int64)
    b = width.copy()
    new_a = a.copy()
    new_b = b.copy()
    med = np.zeros(n)
    for _ in range(4):
        changed = False
        too_few = False
        for g in range(n):
            ag, bg = a[g], b[g]
            base = pre[g, ag]
            total = pre[g, bg] - base
            lo = max((total - 1) // 2, 0)
            hi = max(total // 2, 0)
            j_lo = ag
            while j_lo < bg - 1 and pre[g, j_lo + 1] - base <= lo:
                j_lo += 1
            j_hi = j_lo
            while j_hi < bg - 1 and pre[g, j_hi + 1] - base <= hi:
                j_hi += 1
            mg = 0.5 * (cv[g, j_lo] + cv[g, j_hi])
            med[g] = mg
            # Distances in ascending order: right side from the first value >= the
            # median, left side from the one before, merged.
            r = ag
            while r < bg and cv[g, r] < mg:
                r += 1
            left = r - 1
            run = 0
            d_lo = np.inf
            d_hi = np.inf
            got_lo = False
            while left >= ag or r < bg:
                if r < bg and (left < ag or cv[g, r] - mg <= mg - cv[g, left]):
                    d = abs(cv[g, r] - mg)
                    run += cc[g, r]
                    r += 1
                else:
                    d = abs(cv[g, left] - mg)
                    run += cc[g, left]
                    left -= 1
                if not got_lo and run > lo:
                    d_lo = d
                    got_lo = True
                if run > hi:
                    d_hi = d
                    break
            sd = 1.482602218505602 * 0.5 * (d_lo + d_hi)
            limit = clip_sigma * sd + 1e-30
            na = 0
            while na < width[g] and not abs(cv[g, na] - mg) <= limit:
                na += 1
            nb = na
            while nb < width[g] and abs(cv[g, nb] - mg) <= limit:
                nb += 1
            new_a[g] = na
            new_b[g] = nb
            if na != ag or nb != bg:
                changed = True
            if pre[g, nb] - pre[g, na] < 3:
                too_few = True
        if not changed or too_few:
            break
        a[:] = new_a
        b[:] = new_b
    mean = np.zeros(n)
    sd_out = np.zeros(n)
    cnt = np.zeros(n, np.int64)
    for g in range(n):
        w_sum = 0.0
        v_sum = 0.0
        for j in range(a[g], b[g]):
            w_sum += cc[g, j]
            v_sum += cc[g, j] * cv[g, j]
        cnt_f = max(w_sum, 1.0)
        mu = v_sum / cnt_f
        q = 0.0
        for j in range(a[g], b[g]):
            q += cc[g, j] * (cv[g, j] - mu) ** 2
        mean[g] = mu
        sd_out[g] = np.sqrt(q / max(cnt_f - 1.0, 1.0))
        cnt[g] = max(int(w_sum), 1)
    return med, mean, sd_out, cnt


# Gathers walk runs of consecutive columns in one row (an aperture or annulus row
# between masks; see _jit.as_runs): contiguous reads, a few thousand runs per frame.


@plain
def patch(hit: Any, hit_values: Any, vals: Any) -> Any:
    # Replaced (hot) pixels take their given values; returns which entries they are.
    gone = np.zeros(vals.size, np.bool_)
    for j in range(hit.size):
        vals[hit[j]] = hit_values[j]
        gone[hit[j]] = True
    return gone


@plain
def gather(codes: Any, runs: Any, dy: int, dx: int, table: Any, hit: Any,
           hit_values: Any, vals: Any, keys: Any) -> Any:
    # Code and value of every aperture and annulus entry from a crop of codes.
    for q in range(runs.shape[0]):
        e0, r, c, n = runs[q, 0], runs[q, 1] + dy, runs[q, 2] + dx, runs[q, 3]
        row = codes[r]
        kk = keys[e0:e0 + n]
        for t in range(n):
            kk[t] = row[c + t]
        vv = vals[e0:e0 + n]
        for t in range(n):
            vv[t] = table[kk[t]]
    return patch(hit, hit_values, vals)


@plain
def gather_planes(luma: Any, chroma: Any, r0: int, c0: int, sy_shift: int,
                  sx_shift: int, paired: bool, runs: Any, dy: int, dx: int,
                  table: Any, hit: Any, hit_values: Any, vals: Any, keys: Any) -> Any:
    # As gather, with the codes read from the decoded planes (see
    # radiometry.PlaneSource): Y' or Y' * 256 + the nearest chroma sample
    # chroma[min(y >> sy_shift, last row), min(x >> sx_shift, last column)].
    last_r = chroma.shape[0] - 1
    last_c = chroma.shape[1] - 1
    for q in range(runs.shape[0]):
        e0, n = runs[q, 0], runs[q, 3]
        r = r0 + runs[q, 1] + dy
        c = c0 + runs[q, 2] + dx
        y_row = luma[r]
        kk = keys[e0:e0 + n]
        if paired:
            c_row = chroma[min(r >> sy_shift, last_r)]
            for t in range(n):
                kk[t] = (np.int32(y_row[c + t]) << 8) | np.int32(
                    c_row[min((c + t) >> sx_shift, last_c)])
        else:
            for t in range(n):
                kk[t] = y_row[c + t]
        vv = vals[e0:e0 + n]
        for t in range(n):
            vv[t] = table[kk[t]]
    return patch(hit, hit_values, vals)


@plain
def annulus_rows(keys: Any, vals: Any, gone: Any, n_gone_total: int, starts: Any,
                 paired: bool, table: Any) -> Any:
    # Each annulus (groups n .. 2n-1) as its distinct values, ascending, with
    # counts: a histogram of its codes over the frame's code range (paired codes
    # Y' * 256 + C: over the box of both bytes), plus single entries for replaced
    # pixels. ok is False when the range is too wide for a histogram or an annulus
    # is empty or holds replaced pixels only (the numpy path then runs).
    n = (starts.size - 1) // 2
    b0 = starts[n]
    b1 = starts[2 * n]
    h_min, h_max, l_min, l_max = 1 << 30, -1, 1 << 30, -1
    if paired:
        for i in range(b0, b1):
            k = keys[i]
            h_min = min(h_min, k >> 8)
            h_max = max(h_max, k >> 8)
            l_min = min(l_min, k & 0xFF)
            l_max = max(l_max, k & 0xFF)
    else:
        for i in range(b0, b1):
            h_min = min(h_min, keys[i])
            h_max = max(h_max, keys[i])
        l_min, l_max = 0, 0
    l_span = l_max - l_min + 1
    span = (h_max - h_min + 1) * l_span
    empty = (np.zeros((n, 1)), np.zeros((n, 1), np.int64), np.zeros(n, np.int64), False)
    if b1 <= b0 or span * n > 4 * (b1 - b0):
        return empty
    # Key of a code: (hi - h_min) * l_span + (lo - l_min); for single codes
    # (l_span 1, lo ignored) code - h_min.
    shift = 8 if paired else 0
    mask = 0xFF if paired else 0
    # Four interleaved histograms: runs of equal codes (most of an annulus) would
    # otherwise wait on the previous increment of the same counter.
    hist = np.zeros((4, n * span), np.int32)
    for g in range(n):
        base = g * span - h_min * l_span - l_min
        i = starts[n + g]
        end = starts[n + g + 1]
        while i + 4 <= end:
            for u in range(4):
                k = keys[i + u]
                hist[u, base + (k >> shift) * l_span + (k & mask)] += 1
            i += 4
        while i < end:
            k = keys[i]
            hist[0, base + (k >> shift) * l_span + (k & mask)] += 1
            i += 1
    n_gone = np.zeros(n, np.int64)
    if n_gone_total:
        for g in range(n):
            base = g * span - h_min * l_span - l_min
            for i in range(starts[n + g], starts[n + g + 1]):
                if gone[i]:
                    k = keys[i]
                    hist[0, base + (k >> shift) * l_span + (k & mask)] -= 1
                    n_gone[g] += 1
    total = hist[0]
    for u in range(1, 4):
        total += hist[u]
    width = n_gone.copy()
    for g in range(n):
        if n_gone[g] >= starts[n + g + 1] - starts[n + g]:
            return empty
        base = g * span
        for bin_ in range(span):
            if total[base + bin_] > 0:
                width[g] += 1
    cv = np.full((n, width.max()), np.inf)
    cc = np.zeros((n, width.max()), np.int64)
    row_v = np.empty(width.max())
    row_c = np.empty(width.max(), np.int64)
    for g in range(n):
        m = 0
        base = g * span
        for bin_ in range(span):
            h = total[base + bin_]
            if h > 0:
                code = ((bin_ // l_span + h_min) << shift) + (bin_ % l_span) + l_min
                row_v[m] = table[code]
                row_c[m] = h
                m += 1
        if n_gone[g]:
            for i in range(starts[n + g], starts[n + g + 1]):
                if gone[i]:
                    row_v[m] = np.float64(vals[i])
                    row_c[m] = 1
                    m += 1
        order = np.argsort(row_v[:m], kind="mergesort")
        for j in range(m):
            cv[g, j] = row_v[order[j]]
            cc[g, j] = row_c[order[j]]
    return cv, cc, width, True


@plain
def frame_stats(keys: Any, vals: Any, gone: Any, n_hit: int, starts: Any, ap_w: Any,
                ap_w2: Any, x0: Any, x1: Any, with_noise: bool, paired: bool,
                clip_sigma: float, table: Any) -> Any:
    n_groups = starts.size - 1
    n = n_groups // 2
    # Highest first byte (Y' for video) among the aperture entries that keep their
    # code: a saturation test can be skipped when it is below every saturated code.
    y_max = -1
    for i in range(starts[n]):
        if not gone[i]:
            y_max = max(y_max, (keys[i] >> 8) if paired else keys[i])
    s1, s2 = aperture_sums(vals, ap_w, ap_w2, starts, n)
    if with_noise:
        lev, sq = noise_sums(vals, x0, x1, starts)
    else:
        lev = np.full(n_groups, np.nan)
        sq = np.full(n_groups, np.nan)
    cv, cc, width, ok = annulus_rows(keys, vals, gone, n_hit, starts, paired, table)
    if not ok:
        return (s1, s2, np.zeros(n), np.zeros(n), np.zeros(n), np.zeros(n, np.int64),
                lev, sq, y_max, False)
    med, mean, sd, cnt = clip_rows(cv, cc, width, clip_sigma)
    return s1, s2, med, mean, sd, cnt, lev, sq, y_max, True


@plain
def spot_frame(codes: Any, runs: Any, dy: int, dx: int, table: Any, starts: Any,
               ap_w: Any, ap_w2: Any, hit: Any, hit_values: Any, x0: Any, x1: Any,
               with_noise: bool, paired: bool, clip_sigma: float, vals: Any) -> Any:
    keys = np.empty(vals.size, np.int32)
    gone = gather(codes, runs, dy, dx, table, hit, hit_values, vals, keys)
    return frame_stats(keys, vals, gone, hit.size, starts, ap_w, ap_w2, x0, x1,
                       with_noise, paired, clip_sigma, table)


@plain
def spot_frame_planes(luma: Any, chroma: Any, r0: int, c0: int, sy_shift: int,
                      sx_shift: int, runs: Any, dy: int, dx: int, table: Any,
                      starts: Any, ap_w: Any, ap_w2: Any, hit: Any, hit_values: Any,
                      x0: Any, x1: Any, with_noise: bool, paired: bool,
                      clip_sigma: float, vals: Any) -> Any:
    keys = np.empty(vals.size, np.int32)
    gone = gather_planes(luma, chroma, r0, c0, sy_shift, sx_shift, paired, runs, dy,
                         dx, table, hit, hit_values, vals, keys)
    return frame_stats(keys, vals, gone, hit.size, starts, ap_w, ap_w2, x0, x1,
                       with_noise, paired, clip_sigma, table)
