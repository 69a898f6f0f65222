"""Per-frame kernels of the 2D CFAR detector (numba, ``cache=True``), called by ``Cfar`` in cfar.py.

The map, the window and the noise statistics are defined in cfar.py's docstring. Cost per frame:
CA/GO/SO take circular Doppler box sums per row from float64 prefix sums, then float64 prefix sums
down the range axis (O(cells), independent of the window size). OS takes the exact k-th smallest
training cell per cell: along a row a sorted band of the window's values around the wanted rank is
updated as the window slides, and the full window is only gathered and selected (Hoare selection)
when the rank leaves the band. The sparse OS path (``_os_sparse``, what ``Cfar.detect`` runs for OS
with local maxima) gives the same detections without the statistic of every cell: exact counts of
training cells below a per-band level, from prefix sums, rule out almost every cell; the rest get the
full test, a count of their training cells below p / T (see there for why this is exact on any map).
Every kernel writes into buffers the caller owns.
"""

from __future__ import annotations

import numpy as np
from numba import njit

@njit(cache=True, inline="always")
def _wrap(j, n):
    """Circular index for -n <= j < 2n (Doppler wraps around)."""
    if j < 0:
        return j + n
    if j >= n:
        return j - n
    return j


@njit(cache=True)
def _window_sums(power, wd, gd, pad, dfull, dguard, dleft, dright, cfull, cguard):
    """Row box sums (circular in Doppler) and their column prefix sums, float64."""
    n_r, n_d = power.shape
    for r in range(n_r):
        acc = 0.0
        pad[0] = 0.0
        for m in range(n_d + 2 * wd):
            acc += power[r, _wrap(m - wd, n_d)]
            pad[m + 1] = acc
        for j in range(n_d):
            c = j + wd
            dfull[r, j] = pad[c + wd + 1] - pad[c - wd]
            dguard[r, j] = pad[c + gd + 1] - pad[c - gd]
            dleft[r, j] = pad[c - gd] - pad[c - wd]
            dright[r, j] = pad[c + wd + 1] - pad[c + gd + 1]
    for j in range(n_d):
        cfull[0, j] = 0.0
        cguard[0, j] = 0.0
    for r in range(n_r):
        for j in range(n_d):
            cfull[r + 1, j] = cfull[r, j] + dfull[r, j]
            cguard[r + 1, j] = cguard[r, j] + dguard[r, j]


@njit(cache=True)
def _sum_statistic(kind_code, n_r, n_d, wr, gr, dleft, dright, cfull, cguard, n_all, n_near, n_far, stat):
    """CA (0), GO (2), SO (3) statistic from the prefix sums."""
    for r in range(n_r):
        r0 = max(r - wr, 0)
        r1 = min(r + wr + 1, n_r)
        g0 = max(r - gr, 0)
        g1 = min(r + gr + 1, n_r)
        na = n_all[r]
        nn = n_near[r]
        nf = n_far[r]
        for j in range(n_d):
            if kind_code == 0:
                total = (cfull[r1, j] - cfull[r0, j]) - (cguard[g1, j] - cguard[g0, j])
                v = total / na
            else:
                near = (cfull[r, j] - cfull[r0, j]) - (cguard[r, j] - cguard[g0, j]) + dleft[r, j]
                far = (cfull[r1, j] - cfull[r + 1, j]) - (cguard[g1, j] - cguard[r + 1, j]) + dright[r, j]
                if nn == 0:
                    v = far / nf
                elif nf == 0:
                    v = near / nn
                else:
                    mn = near / nn
                    mf = far / nf
                    if kind_code == 2:
                        v = mn if mn > mf else mf
                    else:
                        v = mn if mn < mf else mf
            if v < 0.0:
                v = 0.0
            stat[r, j] = v


@njit(cache=True)
def _select_kth(a, lo, hi, k):
    """k-th smallest (0-based, lo <= k <= hi) of a[lo:hi+1], in place (Hoare/Wirth selection).

    On return a[lo:k] <= a[k] <= a[k+1:hi+1].
    """
    while lo < hi:
        x = a[k]
        i = lo
        j = hi
        while True:
            while a[i] < x:
                i += 1
            while x < a[j]:
                j -= 1
            if i <= j:
                t = a[i]
                a[i] = a[j]
                a[j] = t
                i += 1
                j -= 1
            if i > j:
                break
        if j < k:
            lo = i
        if k < i:
            hi = j
    return a[k]


@njit(cache=True)
def _pad_doppler(power, wd, padded):
    """padded[r, m] = power[r, (m - wd) mod n_doppler] (circular Doppler padding)."""
    n_r, n_d = power.shape
    for r in range(n_r):
        for m in range(n_d + 2 * wd):
            padded[r, m] = power[r, _wrap(m - wd, n_d)]


@njit(cache=True, inline="always")
def _band_insert(band, m, v):
    """Insert v into the sorted band[:m]; returns the new length."""
    t = m
    while t > 0 and band[t - 1] > v:
        band[t] = band[t - 1]
        t -= 1
    band[t] = v
    return m + 1


@njit(cache=True, inline="always")
def _band_remove(band, m, v):
    """Remove one element equal to v from the sorted band[:m] (v must be present); new length."""
    t = 0
    while band[t] != v:
        t += 1
    for u in range(t, m - 1):
        band[u] = band[u + 1]
    return m - 1


@njit(cache=True, inline="always")
def _band_swap(band, m, below, lo, hi, leaving, entering):
    """One cell leaves the window and one enters: update the sorted band and the count below it."""
    below -= leaving < lo
    if (leaving >= lo) & (leaving <= hi):
        m = _band_remove(band, m, leaving)
    below += entering < lo
    if (entering >= lo) & (entering <= hi):
        m = _band_insert(band, m, entering)
    return m, below


@njit(cache=True)
def _os_statistic(power, padded, wr, gr, wd, gd, td, rank0, scratch, band, rows_full, rows_guard, stat,
                  band_scale):
    """OS statistic: rank0[r]-th smallest (0-based) training cell, window truncated in range.

    Exact, with a sliding band: along a row, the cells of the window whose values lie in a band
    [lo, hi] around the wanted rank are kept sorted, with the count of cells below lo; moving one
    Doppler column only adds and removes the entering and leaving cells. While the wanted rank stays
    inside the band the answer is read off directly; otherwise the whole window is gathered, the
    answer found by selection and a new band (ranks k0 - h .. k0 + h) set up.
    """
    n_r, n_d = power.shape
    _pad_doppler(power, wd, padded)
    width = 2 * wd + 1
    for r in range(n_r):
        k0 = rank0[r]
        nf = 0
        ng = 0
        for rr in range(max(r - wr, 0), min(r + wr + 1, n_r)):
            if rr - r > gr or r - rr > gr:
                rows_full[nf] = rr
                nf += 1
            elif td > 0:
                rows_guard[ng] = rr
                ng += 1
        n = nf * width + ng * 2 * td
        h = max(2, int(band_scale * np.sqrt(n)))
        valid = False
        m = 0
        below = 0
        lo = np.float32(0.0)
        hi = np.float32(0.0)
        for j in range(n_d):
            if valid:
                # slide the window from column j - 1 to j (padded coordinates, CUT at j + wd)
                for q in range(nf):
                    rr = rows_full[q]
                    m, below = _band_swap(band, m, below, lo, hi, padded[rr, j - 1], padded[rr, j + 2 * wd])
                for q in range(ng):
                    rr = rows_guard[q]
                    m, below = _band_swap(band, m, below, lo, hi, padded[rr, j - 1], padded[rr, j + td - 1])
                    m, below = _band_swap(band, m, below, lo, hi, padded[rr, j + wd + gd], padded[rr, j + 2 * wd])
                if below <= k0 and k0 < below + m:
                    stat[r, j] = band[k0 - below]
                    continue
            # gather the whole window and select
            cnt = 0
            for q in range(nf):
                rr = rows_full[q]
                for t in range(width):
                    scratch[cnt + t] = padded[rr, j + t]
                cnt += width
            for q in range(ng):
                rr = rows_guard[q]
                for t in range(td):
                    scratch[cnt + t] = padded[rr, j + t]
                    scratch[cnt + td + t] = padded[rr, j + wd + gd + 1 + t]
                cnt += 2 * td
            ans = _select_kth(scratch, 0, n - 1, k0)
            stat[r, j] = ans
            # new band around rank k0
            if k0 - h >= 0:
                lo = _select_kth(scratch, 0, k0 - 1, k0 - h) if k0 > 0 else ans
            else:
                lo = np.float32(-np.inf)
            if k0 + h <= n - 1:
                hi = _select_kth(scratch, k0 + 1, n - 1, k0 + h)
            else:
                hi = np.float32(np.inf)
            below = 0
            m = 0
            for t in range(n):
                v = scratch[t]
                if v < lo:
                    below += 1
                elif v <= hi:
                    band[m] = v
                    m += 1
            # insertion sort of the band
            for t in range(1, m):
                v = band[t]
                u = t - 1
                while u >= 0 and band[u] > v:
                    band[u + 1] = band[u]
                    u -= 1
                band[u + 1] = v
            valid = True


@njit(cache=True, inline="always")
def _is_local_max(power, r, j, p):
    """3x3 local maximum, circular in Doppler, truncated in range; ties go to the first cell in
    row-major order (the same rule as _extract)."""
    n_r, n_d = power.shape
    for dr in range(-1, 2):
        rr = r + dr
        if rr < 0 or rr >= n_r:
            continue
        for dd in range(-1, 2):
            if dr == 0 and dd == 0:
                continue
            jj = j + dd
            if jj < 0:
                jj += n_d
            elif jj >= n_d:
                jj -= n_d
            if rr == r and jj == j:
                continue
            q = power[rr, jj]
            if dr < 0 or (dr == 0 and dd < 0):
                if not (p > q):
                    return False
            elif q > p:
                return False
    return True


@njit(cache=True, inline="always")
def _count_below(power, r, j, wr, gr, wd, gd, td, fr, p):
    """Training cells x of cell (r, j) with fr * x < p (Doppler circular, range truncated)."""
    n_r, n_d = power.shape
    width = 2 * wd + 1
    j0 = j - wd
    inside = j0 >= 0 and j + wd < n_d
    cnt = 0
    for rr in range(max(r - wr, 0), min(r + wr + 1, n_r)):
        row = power[rr]
        if rr - r > gr or r - rr > gr:
            if inside:
                for t in range(width):
                    cnt += fr * np.float64(row[j0 + t]) < p
            else:
                for t in range(width):
                    cnt += fr * np.float64(row[_wrap(j0 + t, n_d)]) < p
        elif td > 0:
            for t in range(td):
                cnt += fr * np.float64(row[_wrap(j0 + t, n_d)]) < p
                cnt += fr * np.float64(row[_wrap(j0 + wd + gd + 1 + t, n_d)]) < p
    return cnt


@njit(cache=True, inline="always")
def _gather_training(power, r, j, wr, gr, wd, gd, td, scratch):
    """The training cells of (r, j) into scratch; returns their count."""
    n_r, n_d = power.shape
    width = 2 * wd + 1
    j0 = j - wd
    cnt = 0
    for rr in range(max(r - wr, 0), min(r + wr + 1, n_r)):
        row = power[rr]
        if rr - r > gr or r - rr > gr:
            for t in range(width):
                scratch[cnt + t] = row[_wrap(j0 + t, n_d)]
            cnt += width
        elif td > 0:
            for t in range(td):
                scratch[cnt + t] = row[_wrap(j0 + t, n_d)]
                scratch[cnt + td + t] = row[_wrap(j0 + wd + gd + 1 + t, n_d)]
            cnt += 2 * td
    return cnt


@njit(cache=True)
def _band_level(power, t0, t1, stride, fraction, sample):
    """A level for the rows t0:t1: the `fraction` quantile of every stride-th of their cells (a prime
    stride, so that the subsample visits every Doppler column). Speed only, never the result."""
    n_d = power.shape[1]
    flat = power.reshape(-1)
    n = 0
    for i in range(t0 * n_d, t1 * n_d, stride):
        sample[n] = flat[i]
        n += 1
    return _select_kth(sample, 0, n - 1, min(int(fraction * n), n - 1))


@njit(cache=True)
def _column_prefix(power, theta, u0, u1, acc, prefix):
    """prefix[i, j] = #{u0 <= rr < u0 + i: power[rr, j] < theta}, i = 0 .. u1 - u0 (int32)."""
    n_d = power.shape[1]
    for j in range(n_d):
        acc[j] = 0
        prefix[0, j] = 0
    for i in range(u1 - u0):
        row = power[u0 + i]
        for j in range(n_d):  # a separate accumulator: no aliasing, so this vectorises
            acc[j] += np.int32(row[j] < theta)
        nxt = prefix[i + 1]
        for j in range(n_d):
            nxt[j] = acc[j]


@njit(cache=True)
def _group_bound(prefix, u0, n_r, q0, q1, wr, gr, wd, gd, col_full, col_guard, box_full, box_guard, bound):
    """bound[j] >= #{x in S(r, j): x < theta} for every row q0 <= r < q1 (prefix from _column_prefix).

    S(r, j) = R(r, j) minus G(r, j) (window and guard rectangles, Doppler circular, range truncated)
    lies in R' minus G', R' the union of the R(r, j) (rows q0 - wr .. q1 - 1 + wr) and G' the
    intersection of the G(r, j) (rows q1 - 1 - gr .. q0 + gr, possibly none), both spanning the same
    Doppler columns as R(r, j) resp. G(r, j); G' lies in R', so the count over R' minus G' is
    #R' - #G'. For q1 = q0 + 1 the bound is the exact count. Column counts from the prefix sums,
    then box sums along Doppler from running sums over the circularly padded column counts."""
    n_d = bound.shape[0]
    a_hi = prefix[min(q1 - 1 + wr + 1, n_r) - u0]
    a_lo = prefix[max(q0 - wr, 0) - u0]
    g_top = max(q1 - 1 - gr, 0)
    g_end = min(q0 + gr + 1, n_r)
    g_hi = prefix[max(g_end, g_top) - u0]
    g_lo = prefix[g_top - u0]
    full_mid = col_full[wd:wd + n_d]
    guard_mid = col_guard[wd:wd + n_d]
    for j in range(n_d):
        full_mid[j] = a_hi[j] - a_lo[j]
        guard_mid[j] = g_hi[j] - g_lo[j]
    for m in range(wd):  # circular padding: col[m] is column m - wd
        col_full[m] = col_full[n_d + m]
        col_full[n_d + wd + m] = col_full[wd + m]
        col_guard[m] = col_guard[n_d + m]
        col_guard[n_d + wd + m] = col_guard[wd + m]
    sf = np.int32(0)
    sg = np.int32(0)
    box_full[0] = 0
    box_guard[0] = 0
    for m in range(n_d + 2 * wd):
        sf += col_full[m]
        box_full[m + 1] = sf
        sg += col_guard[m]
        box_guard[m + 1] = sg
    full_hi = box_full[2 * wd + 1:]
    guard_hi = box_guard[wd + gd + 1:]
    guard_lo = box_guard[wd - gd:]
    for j in range(n_d):  # cell j: padded columns j .. j + 2 wd, guard j + wd - gd .. j + wd + gd
        bound[j] = full_hi[j] - box_full[j] - (guard_hi[j] - guard_lo[j])


@njit(cache=True, inline="always")
def _emit(i, r, j, p, noise, snr_floor, out_r, out_d, out_p, out_n, out_snr):
    """Write detection i: cell, power, noise and the SNR estimate p / noise - 1 (float32, clipped)."""
    if noise > 0:
        snr = np.float32(np.float32(np.float64(p) / np.float64(noise)) - np.float32(1.0))
        if snr > np.float32(3.4028234663852886e38):
            snr = np.float32(3.4028234663852886e38)
    elif p > 0:
        snr = np.float32(3.4028234663852886e38)
    else:
        snr = np.float32(snr_floor)
    out_r[i] = r
    out_d[i] = j
    out_p[i] = p
    out_n[i] = noise
    out_snr[i] = max(snr, np.float32(snr_floor))


@njit(cache=True)
def _os_cell(power, r, j, wr, gr, wd, gd, td, k0, fr, scratch):
    """The OS-CFAR decision at one cell with local-maximum grouping: its statistic w (the
    (k0 + 1)-th smallest training cell) when the cell is detected, else -1."""
    p = power[r, j]
    if not _is_local_max(power, r, j, p):
        return -1.0
    if _count_below(power, r, j, wr, gr, wd, gd, td, fr, np.float64(p)) < k0 + 1:
        return -1.0
    cnt = _gather_training(power, r, j, wr, gr, wd, gd, td, scratch)
    return np.float64(_select_kth(scratch, 0, cnt - 1, k0))


@njit(cache=True)
def _os_sparse(power, wr, gr, wd, gd, td, rank0, scratch, r_lo, r_hi, factor, noise_scale, snr_floor, geometry,
               level_fraction, sample, prefix, acc, col_full, col_guard, box_full, box_guard, bound, flags, out_r,
               out_d, out_p, out_n, out_snr):
    """OS-CFAR with local-maximum grouping, evaluated in full only where a detection is possible. The
    same answer as the full statistic followed by _extract(local_max=True), on any map; returns the
    count, with the per-channel SNR estimate power / noise - 1 (float32, at least snr_floor).
    geometry = (rows per band, rows per group, sample stride) (speed only); flags: a uint8 buffer of
    n_d rounded up to a multiple of 8, zero beyond n_d.

    A cell (r, j) of power p is detected when p > T_r w, w the k_r-th smallest of its training set S
    (k_r = rank0[r] + 1). Since x -> T_r x is monotonic (also after rounding), that holds exactly when
    at least k_r training cells have T_r x < p: a count, so the selection of w (for the noise
    estimate) runs only for the detections.

    Exact skip: take a level theta (any value; here per band of rows a quantile of the band's cells,
    _band_level) and, per group of rows, b(j) >= #{x in S(r, j): x < theta} for every row r of the
    group (_group_bound). If p <= T_r theta (in float64, as the test rounds) then T_r x < p implies
    x < theta, so #{x in S: T_r x < p} <= b(j); with b(j) <= rank0[r] as well the cell cannot be
    detected and is skipped, whatever the map holds. A cell that fails the bound of its group is
    tried again against its own row's exact count; every other cell (p > T_r theta: few in noise or
    clutter of the band's level; or an exact count >= k_r: a region quieter than the band's level)
    gets the full test."""
    n_r, n_d = power.shape
    band_rows, group_rows, stride = geometry[0], geometry[1], geometry[2]
    words = flags.view(np.uint64)  # flags: n_d rounded up to a multiple of 8, the rest stays 0
    count = 0
    for t0 in range(r_lo, r_hi, band_rows):
        t1 = min(t0 + band_rows, r_hi)
        theta = _band_level(power, t0, t1, stride, level_fraction, sample)
        u0 = max(t0 - wr, 0)
        _column_prefix(power, theta, u0, min(t1 + wr, n_r), acc, prefix)
        for q0 in range(t0, t1, group_rows):
            q1 = min(q0 + group_rows, t1)
            group = bound[0]
            own = bound[1]
            _group_bound(prefix, u0, n_r, q0, q1, wr, gr, wd, gd, col_full, col_guard, box_full, box_guard, group)
            for r in range(q0, q1):
                k0 = rank0[r]
                fr = factor[r]
                floor = fr * np.float64(theta)
                row = power[r]
                for j in range(n_d):  # vectorises ("not <=": a NaN is looked at)
                    flags[j] = (not (np.float64(row[j]) <= floor)) | (group[j] > k0)
                own_ready = False  # (arrays are never reassigned here: that costs a reference count per cell)
                for word in range(words.shape[0]):  # eight flags at a time: most are all zero
                    if words[word] == 0:
                        continue
                    for j in range(8 * word, 8 * word + 8):
                        if not flags[j]:
                            continue
                        p = row[j]
                        if np.float64(p) <= floor:  # else: the full test
                            if group[j] <= k0:
                                continue
                            if not own_ready:  # this row's exact counts, once
                                _group_bound(prefix, u0, n_r, r, r + 1, wr, gr, wd, gd, col_full, col_guard, box_full,
                                             box_guard, own)
                                own_ready = True
                            if own[j] <= k0:
                                continue
                        w = _os_cell(power, r, j, wr, gr, wd, gd, td, k0, fr, scratch)
                        if w < 0.0:
                            continue
                        _emit(count, r, j, p, np.float32(w * noise_scale[r]), snr_floor, out_r, out_d, out_p, out_n,
                              out_snr)
                        count += 1
    return count


@njit(cache=True)
def _extract(power, stat, factor, noise_scale, r_lo, r_hi, local_max, out_r, out_d, out_p, out_n):
    """Threshold crossings (optionally 3x3 local maxima) in rows [r_lo, r_hi); returns the count."""
    n_r, n_d = power.shape
    count = 0
    for r in range(r_lo, r_hi):
        fr = factor[r]
        for j in range(n_d):
            p = power[r, j]
            w = stat[r, j]
            if not (np.float64(p) > fr * np.float64(w)):
                continue
            if local_max and not _is_local_max(power, r, j, p):
                continue
            out_r[count] = r
            out_d[count] = j
            out_p[count] = p
            out_n[count] = np.float32(w * noise_scale[r])
            count += 1
    return count
