"""The front end: per frame and receive channel, what a board under bring-up does to its samples, measured
and (where a setting asks) repaired before the range FFT.

FRONTEND_DTYPE is one record per RX channel (little-endian):
  clipped_samples      samples (complex) with I or Q at or beyond the ADC full scale
  samples              samples looked at (chirps x samples per chirp)
  interference_bursts  contiguous runs of flagged samples in fast time, counted over the frame
  interference_samples samples flagged (and mitigated when mitigation is on)
  noise_floor_db       10 log10 of the channel's noise power per complex sample, counts^2
  dc_offset_counts     magnitude of the channel's complex mean over the frame, before removal
  image_rejection_db   blind image-rejection estimate of the frame, before correction

One compiled call per RX channel (`front_load`, called by rangefft.py) reads the channel's chirps
in three passes. The first, over every chirp in the board's own numbers (int16 or float32, any I/Q
convention), finds each chirp's largest and smallest number (a chirp that reaches the full scale is
counted exactly, sample by sample) and the largest difference, in either component, between the
chirp and the same slot's chirp in the next loop. The second, over every stride-th chirp (the stride
moment_stride() chooses: about MOMENT_SAMPLES samples, every chirp of a small frame), sums
the first and second moments of I and Q (the DC, i.e. the complex mean over the frame, and the blind
image-rejection estimate, both estimated from that subsample: the DC to within its standard error
sqrt(var / N) of the subsample's N samples) and the mean difference power to the next loop. The
third is the load the range FFT needs anyway (both windows applied, in frame order) with the DC (or
the static mean) subtracted and the I/Q correction applied (the DC only when it stands out of its
standard error by DC_SIGNIFICANCE: removing a mean that is only noise, or a part of the echoes, would
just add the window's sidelobes of a constant); only a chirp whose largest difference
could pass the threshold is looked at again, sample by sample, and repaired.

Interference from another FMCW sensor sweeps through our IF band within a few samples while the two
sweeps cross: a burst in fast time, at a different place in every chirp (the two sensors' chirps are
not synchronous). Echoes of a scene change little from one loop to the next, so the difference
d[k] = x_c[k] - x_c'[k] between a chirp c and the same slot's chirp c' one loop away removes static
echoes, DC and leakage exactly and moving echoes mostly, and leaves a burst standing out. For white
noise of variance s^2 per complex sample |d|^2 is exponential with mean 2 s^2. The threshold is
T = 10^(interference_threshold_db / 10) x L, L the median over the subsampled chirps of their mean
|d|^2 (median-based; when more than a quarter of those chirps hold a burst, each chirp's own level is
the median of its block means over N_BLOCKS blocks of fast time instead, so bursts in every chirp
do not raise it). A sample is flagged when |d|^2 > T against the previous loop's chirp and against
the next loop's (for the first and last loop, against the two nearest loops), widened by
interference_guard_samples on both sides; each contiguous run in a chirp is a burst. In white noise
one difference passes T with probability exp(-T / 2 s^2) (the exponential's tail; 4.5e-5 at the
default 10 dB), both together far less often. Mitigation replaces a burst's samples by zeros, or
(interpolate, the default) by the mean of the same samples in the two chirps of the slot it was
compared with: interpolation in slow time, which keeps every static echo and, nearly, the moving ones
(zeroing cuts a hole in every echo's tone and spreads the strong ones over all range bins). Where
those two chirps differ from each other by more than T at a sample, one of them holds a burst there
too (an interferer locked to our loop period puts its bursts on the same samples of consecutive
loops) and the sample is zeroed instead.

After the Doppler FFT (`suppress_leakage`, per RX, when leakage_max_range_m asks): the TX-to-RX
leakage is a strong static return in
the first range bins; in the range bins below leakage_max_range_m (and, with complex sampling, their
negative-frequency mirrors) the component along the Doppler window's spectrum (the static return,
windowed) is projected out, exactly as remove_static would do for those bins alone. Then the noise
floor (`noise_floor`): the median of |X|^2 over a fixed subsample of the channel's range-Doppler cells (NOISE_CELLS
spread over slots, range and Doppler; read by the map's accumulation, doppler.py, while it has each
range row), divided by ln 2 (the median of a unit-mean exponential, the
distribution of |X|^2 in complex Gaussian noise) and by the windows' noise gain sum(w_r^2) sum(w_d^2),
reads 10 log10 s^2 for white noise of variance s^2 per complex sample. Targets and leakage hold few
cells and move a median little.

I/Q imbalance (README "I/Q imbalance"): per RX, Q-branch gain g and phase error phi; the board's
I' = I, Q' = g (Q cos phi - I sin phi) is undone as I = I', Q = (Q' / g + I' sin phi) / cos phi,
after the DC removal, in the canonical frame's I/Q. The blind estimate from a circular signal (DC
removed): g^2 = E[Q'^2] / E[I'^2], sin phi = -E[I'Q'] / sqrt(E[I'^2] E[Q'^2]); the image-rejection
ratio IRR = (1 + 2 g cos phi + g^2) / (1 - 2 g cos phi + g^2) (common practice; e.g. Razavi, RF
Microelectronics, 2nd ed., 2011), written in the moments as
(E[I^2] + E[Q^2] + 2 r) / (E[I^2] + E[Q^2] - 2 r), r = sqrt(E[I^2] E[Q^2] - E[IQ]^2).
"""

from __future__ import annotations

import math

import numba
import numpy as np

FRONTEND_FIELDS = (
    ("clipped_samples", "<u4"),
    ("samples", "<u4"),
    ("interference_bursts", "<u4"),
    ("interference_samples", "<u4"),
    ("noise_floor_db", "<f4"),
    ("dc_offset_counts", "<f4"),
    ("image_rejection_db", "<f4"),
)
FRONTEND_DTYPE = np.dtype(list(FRONTEND_FIELDS))

MITIGATION_CODES = {"off": 0, "zero": 1, "interpolate": 2}
N_BLOCKS = 8  # blocks per chirp of the difference power's robust level
NOISE_CELLS = 2048  # range-Doppler cells per channel in the noise floor's median
IRR_MAX_DB = 120.0  # a perfectly balanced frame (or one without Q) reads at most this
MOMENTS = 8  # per channel: (unused), s0, s1, s00, s11, s01 of the subsampled chirps, (unused), (unused)
MOMENT_SAMPLES = 16384  # samples (at least) behind the DC, image-rejection and level estimates
DC_SIGNIFICANCE = 25.0  # DC removed when |mean|^2 > 25 var / N: five standard errors of the mean
NARROW_LIMIT = 16383  # int16 samples within +-this have int16 differences


@numba.njit(cache=True, nogil=True, inline="always")
def _scan_wide(src, rx, c, c2, n):
    """Chirp c of channel rx, every chirp: its largest and smallest number and the largest
    |x[k] - y[k]| against chirp c2 (the same slot's chirp in the next loop), over the 2n interleaved
    numbers (indexed in src itself: no views in the hot loop)."""
    n2 = 2 * n
    hi = src[c, rx, 0]
    lo = src[c, rx, 0]
    for k in range(n2):
        hi = max(hi, src[c, rx, k])
        lo = min(lo, src[c, rx, k])
    dh = src[c, rx, 0] - src[c, rx, 0]
    dl = dh
    for k in range(n2):
        d = src[c, rx, k] - src[c2, rx, k]
        dh = max(dh, d)
        dl = min(dl, d)
    return np.float64(hi), np.float64(lo), np.float64(max(dh, -dl))


@numba.njit(cache=True, nogil=True, inline="always")
def _scan_int16(src, rx, c, c2, n):
    """_scan_wide of int16 data whose differences cannot overflow (NARROW_LIMIT), in int16 lanes."""
    n2 = 2 * n
    hi = src[c, rx, 0]
    lo = src[c, rx, 0]
    for k in range(n2):
        hi = max(hi, src[c, rx, k])
        lo = min(lo, src[c, rx, k])
    dh = np.int16(0)
    dl = np.int16(0)
    for k in range(n2):
        d = np.int16(src[c, rx, k] - src[c2, rx, k])
        dh = max(dh, d)
        dl = min(dl, d)
    return np.float64(hi), np.float64(lo), np.float64(max(np.int32(dh), -np.int32(dl)))


@numba.njit(cache=True, nogil=True, inline="always")
def _scan_chirp(src, rx, c, n_slots, last, n, narrow, full_scale, scan):
    """scan[c] of chirp c of channel rx: (its largest difference to the same slot's chirp in the next
    loop, squared; inf when int16 differences may have wrapped, so that the chirp is looked at
    exactly) and (1 when it reaches the full scale, else 0). The last loop compares with the one before."""
    c2 = c + n_slots if c < last else c - n_slots
    if narrow:
        hi, lo, dmax = _scan_int16(src, rx, c, c2, n)
    else:
        hi, lo, dmax = _scan_wide(src, rx, c, c2, n)
    scan[c, 0] = dmax * dmax
    scan[c, 1] = 1.0 if (hi >= full_scale or lo <= -full_scale) else 0.0
    if narrow and (hi > NARROW_LIMIT or lo < -NARROW_LIMIT):
        scan[c, 0] = np.inf  # the int16 differences may have wrapped: look at this chirp exactly


@numba.njit(cache=True, nogil=True)
def _row_moments_int(row, other, n, mom):
    """_row_moments for int16 rows, in exact integer sums."""
    s0 = np.int64(0)
    s1 = np.int64(0)
    s00 = np.int64(0)
    s11 = np.int64(0)
    s01 = np.int64(0)
    for k in range(n):
        a = np.int32(row[2 * k])
        b = np.int32(row[2 * k + 1])
        s0 += a
        s1 += b
        s00 += a * a
        s11 += b * b
        s01 += a * b
    acc = np.int64(0)
    for k in range(2 * n):
        d = np.int32(row[k]) - np.int32(other[k])
        acc += d * d
    mom[1] += s0
    mom[2] += s1
    mom[3] += s00
    mom[4] += s11
    mom[5] += s01
    return acc / n


@numba.njit(cache=True, nogil=True, fastmath={"reassoc", "nsz"})
def _row_moments(row, other, n, mom):
    """A subsampled chirp's row: adds its sums of I, Q, I^2, Q^2, IQ (row order) to mom[1..5] and
    returns its mean difference power against the next loop's chirp, mean |row - other|^2."""
    s0 = 0.0
    s1 = 0.0
    s00 = 0.0
    s11 = 0.0
    s01 = 0.0
    acc = 0.0
    for k in range(n):
        a = np.float64(row[2 * k])
        b = np.float64(row[2 * k + 1])
        s0 += a
        s1 += b
        s00 += a * a
        s11 += b * b
        s01 += a * b
    for k in range(2 * n):
        d = np.float64(row[k]) - np.float64(other[k])
        acc += d * d
    mom[1] += s0
    mom[2] += s1
    mom[3] += s00
    mom[4] += s11
    mom[5] += s01
    return acc / n


@numba.njit(cache=True, nogil=True)
def _block_level(row, other, n, block):
    """A chirp's robust difference power: the median over N_BLOCKS blocks of fast time of the block
    means of |row - other|^2 (a burst inside one or a few blocks leaves it alone)."""
    nb = min(N_BLOCKS, n)
    size = n // nb
    for j in range(nb):
        lo = j * size
        hi = n if j == nb - 1 else (j + 1) * size
        acc = 0.0
        for k in range(2 * lo, 2 * hi):
            d = np.float64(row[k]) - np.float64(other[k])
            acc += d * d
        block[j] = acc / (hi - lo)
    for j in range(1, nb):
        v = block[j]
        i = j - 1
        while i >= 0 and block[i] > v:
            block[i + 1] = block[i]
            i -= 1
        block[i + 1] = v
    h = nb // 2
    return block[h] if nb % 2 else 0.5 * (block[h - 1] + block[h])


@numba.njit(cache=True, nogil=True)
def _count_clipped(row, n, full_scale):
    clip = 0
    for k in range(n):
        clip += (abs(np.float64(row[2 * k])) >= full_scale) | (abs(np.float64(row[2 * k + 1])) >= full_scale)
    return clip


@numba.njit(cache=True, nogil=True)
def _corrected(row, off, k, ci, iq_a, iq_b):
    """Sample k of a row, offsets removed and the I/Q correction applied, as the two numbers the
    window w2 multiplies (I, and Q in the row's own sign)."""
    i = np.float64(row[2 * k + ci]) - np.float64(off[2 * k + ci])
    q = np.float64(row[2 * k + 1 - ci]) - np.float64(off[2 * k + 1 - ci])
    return i, iq_a * q + iq_b * i


@numba.njit(cache=True, nogil=True)
def _diff2(row, other, k):
    da = np.float64(row[2 * k]) - np.float64(other[2 * k])
    db = np.float64(row[2 * k + 1]) - np.float64(other[2 * k + 1])
    return da * da + db * db


@numba.njit(cache=True, nogil=True)
def _clipped_at(row, k, full_scale):
    return (abs(np.float64(row[2 * k])) >= full_scale) | (abs(np.float64(row[2 * k + 1])) >= full_scale)


@numba.njit(cache=True, nogil=True)
def _repair(row, prev, nxt, has_prev, has_next, out, n, ci, off, iq_a, iq_b, w2, wd, threshold, guard, mode, flags,
            full_scale):
    """Flag the samples of one chirp whose difference power against the same slot's chirps in the
    previous and next loop passes the threshold on every side there is (widened by `guard`), repair
    them in `out` (mode 1 zero, 2 the mean of those neighbours' samples; 0 leaves them) and return
    (bursts, flagged samples). A sample clipped in this chirp or in a chirp it is compared with never
    triggers: a saturating echo differs from loop to loop too, but it is clipping (counted as such),
    not interference; a burst's unclipped edges still trigger and the guard covers its clipped core."""
    for k in range(n):
        flags[k] = 0
    for k in range(n):
        if _clipped_at(row, k, full_scale) or (has_prev and _clipped_at(prev, k, full_scale)) \
                or (has_next and _clipped_at(nxt, k, full_scale)):
            continue
        hit = True
        if has_prev:
            hit = _diff2(row, prev, k) > threshold
        if has_next and hit:
            hit = _diff2(row, nxt, k) > threshold
        if hit:
            for j in range(max(0, k - guard), min(n, k + 1 + guard)):
                flags[j] = 1
    bursts = 0
    flagged = 0
    k = 0
    while k < n:
        if flags[k] == 0:
            k += 1
            continue
        a = k
        while k < n and flags[k]:
            k += 1
        bursts += 1
        flagged += k - a
        if mode == 0:
            continue
        for j in range(a, k):
            # interpolation only where the two chirps it would take the sample from agree with each other
            # (their difference passes no threshold): an interferer whose bursts fall on the same samples
            # of consecutive loops (its chirps locked to our loop period) is in them as well, so there
            # the sample is zeroed instead
            if mode == 1 or (has_prev and has_next and _diff2(prev, nxt, j) > threshold):
                out[2 * j] = 0.0
                out[2 * j + 1] = 0.0
                continue
            vi = 0.0
            vq = 0.0
            if has_prev:
                vi, vq = _corrected(prev, off, j, ci, iq_a, iq_b)
            if has_next:
                ni, nq = _corrected(nxt, off, j, ci, iq_a, iq_b)
                if has_prev:
                    vi, vq = 0.5 * (vi + ni), 0.5 * (vq + nq)
                else:
                    vi, vq = ni, nq
            out[2 * j] = np.float32(vi) * (w2[2 * j] * wd)
            out[2 * j + 1] = np.float32(vq) * (w2[2 * j + 1] * wd)
    return bursts, flagged


@numba.njit(cache=True, nogil=True)
def _image_rejection_db(e_ii, e_qq, e_iq):
    """IRR from the central moments (module docstring); NaN without power."""
    p = e_ii + e_qq
    if not p > 0:
        return np.nan
    r = math.sqrt(max(0.0, e_ii * e_qq - e_iq * e_iq))
    den = p - 2.0 * r
    if den <= p * 10.0 ** (-IRR_MAX_DB / 10.0):
        return IRR_MAX_DB
    return 10.0 * math.log10((p + 2.0 * r) / den)


@numba.njit(cache=True, nogil=True)
def front_load(src, rx, n_slots, w2, w_doppler, swap, qsign, full_scale, narrow, remove_static, dc_removal, iq_a,
               iq_b, mode, threshold_factor, guard, stride, mom, block, scan, level, off, mean, flags, stage, rec):
    """Receive channel `rx` of the frame `src` [chirp, rx, 2 n] (interleaved I/Q, int16 or float32; I at
    position 1 with `swap`, the canonical Q = qsign x the row's) into the staging block
    stage[s, p, 2k + c] = w2[2k + c] w_doppler[p] y[p n_slots + s, k, c]: y the row with its offsets
    removed (the static mean over the loops of its slot, or the DC), I/Q corrected (Q <- iq_a Q +
    iq_b I in the row's own sign: the caller folds qsign into iq_b) and its interference bursts repaired (mode 1 zero, 2 interpolate).
    Fills rec[rx] but for noise_floor_db (module docstring)."""
    n2 = w2.shape[0]
    n = n2 // 2
    n_loops = w_doppler.shape[0]
    n_chirps = n_loops * n_slots
    ci = 1 if swap else 0
    for j in range(MOMENTS):
        mom[j] = 0.0
    last = n_chirps - n_slots  # chirps of the last loop compare with the loop before
    for c in range(n_chirps):
        _scan_chirp(src, rx, c, n_slots, last, n, narrow, full_scale, scan)
    n_sub = 0
    for c in range(0, n_chirps, stride):
        other = src[c + n_slots if c < last else c - n_slots, rx]
        if narrow:
            level[n_sub] = _row_moments_int(src[c, rx], other, n, mom)
        else:
            level[n_sub] = _row_moments(src[c, rx], other, n, mom)
        n_sub += 1
    m_count = np.float64(n_sub * n)  # the DC and the moments: from the subsampled chirps
    m0, m1 = mom[1] / m_count, mom[2] / m_count
    v00 = mom[3] / m_count - m0 * m0
    v11 = mom[4] / m_count - m1 * m1
    v01 = mom[5] / m_count - m0 * m1
    r = rec[rx]
    r.samples = np.uint32(n_chirps * n)
    r.dc_offset_counts = np.float32(math.sqrt(m0 * m0 + m1 * m1))
    # canonical I is the row's component ci; the product's sign follows qsign (squares do not)
    if swap:
        r.image_rejection_db = np.float32(_image_rejection_db(v11, v00, qsign * v01))
    else:
        r.image_rejection_db = np.float32(_image_rejection_db(v00, v11, qsign * v01))
    threshold = threshold_factor * np.median(level[:n_sub])
    # a chirp trips when either component's largest difference could make |d|^2 pass (|d|^2 <= 2 max^2)
    tripped = 0
    for c in range(0, n_chirps, stride):
        tripped += 2.0 * scan[c, 0] > threshold
    if n_loops < 2:
        threshold = np.inf  # nothing to compare a chirp with
    if 4 * tripped > n_sub:  # bursts in many chirps: the robust per-chirp level instead of the mean
        n_sub = 0
        for c in range(0, n_chirps, stride):
            level[n_sub] = _block_level(src[c, rx], src[c + n_slots if c < last else c - n_slots, rx], n, block)
            n_sub += 1
        threshold = threshold_factor * np.median(level[:n_sub])
    for k in range(n2):
        off[k] = 0.0
    # the DC is removed when it stands out of its own standard error, sqrt(var / N) (a mean of pure
    # noise or of echoes, far below that, is left alone: removing it would only add the window's
    # sidelobes of a constant)
    significant = (m0 * m0 + m1 * m1) * m_count > DC_SIGNIFICANCE * (v00 + v11)
    if dc_removal and not remove_static and significant:
        for k in range(n):
            off[2 * k] = m0
            off[2 * k + 1] = m1
    plain = not swap and iq_a == 1.0 and iq_b == 0.0
    a32, b32 = np.float32(iq_a), np.float32(iq_b)
    bursts = 0
    flagged = 0
    clipped = 0
    for s in range(n_slots):
        if remove_static:
            for k in range(n2):
                mean[k] = 0.0
            for p in range(n_loops):
                row = src[p * n_slots + s, rx]
                for k in range(n2):
                    mean[k] += row[k]
            for k in range(n2):
                off[k] = mean[k] / n_loops
        for p in range(n_loops):
            c = p * n_slots + s
            row = src[c, rx]
            out = stage[s, p]
            wd = w_doppler[p]
            if plain:  # indexed in src and stage themselves: no views in the hot loop
                for k in range(n2):
                    stage[s, p, k] = (np.float32(src[c, rx, k]) - off[k]) * (w2[k] * wd)
            else:
                for k in range(n):
                    i = np.float32(row[2 * k + ci]) - off[2 * k + ci]
                    q = np.float32(row[2 * k + 1 - ci]) - off[2 * k + 1 - ci]
                    out[2 * k] = i * (w2[2 * k] * wd)
                    out[2 * k + 1] = (a32 * q + b32 * i) * (w2[2 * k + 1] * wd)
            if scan[c, 1] > 0:
                clipped += _count_clipped(row, n, full_scale)
            # a burst in chirp c shows in its own scan and in the previous loop's (which compares with c)
            if 2.0 * max(scan[c, 0], scan[c - n_slots, 0] if p > 0 else 0.0) > threshold:
                # the two chirps of the slot compared with: the neighbouring loops, or at the first and
                # last loop the two nearest on the one side there is
                pa = p - 1 if p > 0 else p + 2
                pb = p + 1 if p < n_loops - 1 else p - 2
                two = n_loops >= 3
                prev = src[pa * n_slots + s, rx] if two or p > 0 else row
                nxt = src[pb * n_slots + s, rx] if two or p < n_loops - 1 else row
                b, f = _repair(row, prev, nxt, two or p > 0, two or p < n_loops - 1, out, n, ci, off, iq_a, iq_b,
                               w2, wd, threshold, guard, mode, flags, full_scale)
                bursts += b
                flagged += f
    r.clipped_samples = np.uint32(clipped)
    r.interference_bursts = np.uint32(bursts)
    r.interference_samples = np.uint32(flagged)


@numba.njit(cache=True, nogil=True)
def suppress_leakage(rows, leak_bins, wd_spec):
    """One RX's Doppler spectrum rows [slot, range, doppler] (unshifted): the component along the
    Doppler window's spectrum wd_spec projected out of every range bin in leak_bins."""
    n_slots = rows.shape[0]
    nd = wd_spec.shape[0]
    norm = 0.0
    for d in range(nd):
        norm += wd_spec[d].real * wd_spec[d].real + wd_spec[d].imag * wd_spec[d].imag
    for s in range(n_slots):
        for b in range(leak_bins.shape[0]):
            row = rows[s, leak_bins[b]]
            acc = 0j
            for d in range(nd):
                acc += np.conj(wd_spec[d]) * row[d]
            c = acc / norm
            for d in range(nd):
                row[d] -= np.complex64(c * wd_spec[d])


MEDIAN_SHIFT = 20  # the median's histogram: bins of the float32 bit pattern >> this (an eighth of an octave)


@numba.njit(cache=True, nogil=True)
def median_nonnegative(x, hist, tmp):
    """np.median of float32 values that are >= 0 or NaN (NaN if any is), without sorting them all: the
    bit patterns of non-negative floats order as the floats do, so a histogram of their top bits finds
    the bins that hold the middle ranks and only those values are sorted (hist: int32
    [2^31 >> MEDIAN_SHIFT], tmp: float32 [len(x)], both scratch)."""
    n = x.shape[0]
    bits = x.view(np.int32)
    hist[:] = 0
    for i in range(n):
        if bits[i] < 0:  # a NaN with its sign bit set (no value here is negative)
            return np.nan
        hist[bits[i] >> MEDIAN_SHIFT] += 1
    if hist[(0x7F800001 >> MEDIAN_SHIFT):].sum() > 0 and np.isnan(x).any():
        return np.nan
    lo_rank = (n - 1) // 2   # the middle rank, or the lower of the two
    hi_rank = n // 2
    below = 0
    b_lo = 0
    while below + hist[b_lo] <= lo_rank:
        below += hist[b_lo]
        b_lo += 1
    b_hi = b_lo
    count = below + hist[b_lo]
    while count <= hi_rank:
        b_hi += 1
        count += hist[b_hi]
    m = 0
    for i in range(n):
        b = bits[i] >> MEDIAN_SHIFT
        if b_lo <= b <= b_hi:
            tmp[m] = x[i]
            m += 1
    part = np.sort(tmp[:m])
    a = part[lo_rank - below]
    c = part[hi_rank - below]
    if n % 2:
        return np.float64(a)
    return (a + c) / 2


@numba.njit(cache=True, nogil=True)
def noise_floor(power, noise_gain, rec, rx, hist, tmp):
    """rec[rx].noise_floor_db from the median of the sampled cells' |X|^2 (module docstring)."""
    med = median_nonnegative(power, hist, tmp)
    if med > 0:
        rec[rx].noise_floor_db = np.float32(10.0 * math.log10(med / noise_gain))
    else:
        rec[rx].noise_floor_db = np.float32(-np.inf)


def moment_stride(n_chirps: int, samples_per_chirp: int) -> int:
    """Every how many chirps the DC, image-rejection and level estimates look at: as many as keep at
    least MOMENT_SAMPLES samples (every chirp of a frame smaller than that)."""
    return max(1, (n_chirps * samples_per_chirp) // MOMENT_SAMPLES)


class FrontEnd:
    """The front end's settings, tables and buffers for one sensor (everything computed once)."""

    def __init__(self, sensor, settings, range_window: np.ndarray, doppler_window: np.ndarray, n_range_bins: int,
                 range_bin_m: float, doppler_fft_size: int, iq_imbalance: np.ndarray | None):
        n, n_chirps = sensor.samples_per_chirp, sensor.chirps_per_frame
        self.n_rx = sensor.n_rx
        self.full_scale = float(sensor.adc.full_scale)
        self.remove_static = bool(settings.remove_static)
        self.dc_removal = bool(settings.dc_removal)
        self.mode = MITIGATION_CODES[settings.interference_mitigation]
        self.threshold_factor = 10.0 ** (settings.interference_threshold_db / 10.0)
        self.guard = int(settings.interference_guard_samples)
        self.record = np.zeros(sensor.n_rx, FRONTEND_DTYPE)
        self.record["samples"] = n_chirps * n
        self.stride = moment_stride(n_chirps, n)
        self.iq_a = np.ones(sensor.n_rx, np.float64)
        self.iq_b = np.zeros(sensor.n_rx, np.float64)
        if iq_imbalance is not None:
            g, phi = iq_imbalance[:, 0], iq_imbalance[:, 1]
            self.iq_a = 1.0 / (g * np.cos(phi))   # Q = Q' / (g cos phi) + I' tan phi
            self.iq_b = np.tan(phi)
        self._mom = np.zeros(MOMENTS, np.float64)
        self._block = np.zeros(N_BLOCKS, np.float64)
        self._scan = np.zeros((n_chirps, 2), np.float64)
        self._level = np.zeros(n_chirps, np.float64)
        self.narrow = sensor.adc.is_complex and sensor.adc.sample_type == "int16"
        self.complex_sampling = sensor.adc.is_complex
        self._off = np.zeros(2 * n, np.float32)
        self._mean = np.zeros(2 * n, np.float64)
        self._flags = np.zeros(n, np.uint8)
        # leakage: bins k with k * bin < leakage_max_range_m, and their mirrors -k with complex sampling
        n_leak = int(math.ceil(settings.leakage_max_range_m / range_bin_m)) if settings.leakage_max_range_m > 0 else 0
        n_leak = min(n_leak, n_range_bins)
        bins = list(range(n_leak))
        if sensor.adc.is_complex:
            bins += [n_range_bins - k for k in range(1, n_leak) if n_range_bins - k >= n_leak]
        self.leak_bins = np.array(sorted(bins), np.int64)
        self._wd_spec = np.fft.fft(doppler_window.astype(np.float64), doppler_fft_size).astype(np.complex128)
        # noise floor: a fixed subsample of [slot, range, doppler], an odd stride over the flat index
        total = sensor.n_slots * n_range_bins * doppler_fft_size
        m = min(NOISE_CELLS, total)
        step = max(1, total // m) | 1
        flat = (np.arange(m, dtype=np.int64) * step) % total
        cell_s, rest = np.divmod(flat, n_range_bins * doppler_fft_size)
        cell_r, cell_d = np.divmod(rest, doppler_fft_size)
        order = np.argsort(cell_r, kind="stable")   # by range bin: read while the accumulation has the row
        self._power = np.zeros(m, np.float32)
        self._hist = np.zeros((1 << 31) >> MEDIAN_SHIFT, np.int32)
        self._median_tmp = np.zeros(m, np.float32)
        self.noise_cells = (np.searchsorted(cell_r[order], np.arange(n_range_bins + 1)).astype(np.int64),
                            np.ascontiguousarray(cell_s[order]), np.ascontiguousarray(cell_d[order]), self._power)
        w_r = range_window.astype(np.float64)
        w_d = doppler_window.astype(np.float64)
        self.noise_gain = math.log(2.0) * float(np.sum(w_r ** 2)) * float(np.sum(w_d ** 2))

    def load(self, src: np.ndarray, rx: int, n_slots: int, w2: np.ndarray, doppler_window: np.ndarray, swap: bool,
             qsign: float, stage_f: np.ndarray) -> None:
        front_load(src, rx, n_slots, w2, doppler_window, swap, qsign, self.full_scale,
                   self.narrow and src.dtype == np.int16, self.remove_static, self.dc_removal, self.iq_a[rx],
                   qsign * self.iq_b[rx], self.mode, self.threshold_factor, self.guard, self.stride, self._mom,
                   self._block, self._scan,
                   self._level, self._off, self._mean, self._flags, stage_f, self.record)
        if not self.complex_sampling:  # one branch: no image to reject
            self.record["image_rejection_db"][rx] = np.nan

    def after_doppler(self, rows: np.ndarray, rx: int) -> None:
        """Before the accumulation: the leakage region of one RX's Doppler rows projected out."""
        if self.leak_bins.shape[0]:
            suppress_leakage(rows, self.leak_bins, self._wd_spec)

    def after_accumulate(self, rx: int) -> None:
        """After the accumulation filled the sampled cells' power (noise_cells): the channel's noise floor."""
        noise_floor(self._power, self.noise_gain, self.record, rx, self._hist, self._median_tmp)


def blind_iq_imbalance(frame: np.ndarray) -> np.ndarray:
    """float64 [n_rx, 2]: each receive channel's blind Q-branch gain g and phase error phi (radians) of a
    canonical frame [chirp, rx, sample] (module docstring: moments after removing the channel's mean)."""
    x = np.asarray(frame).astype(np.complex128)
    i = x.real - x.real.mean(axis=(0, 2), keepdims=True)
    q = x.imag - x.imag.mean(axis=(0, 2), keepdims=True)
    e_ii, e_qq, e_iq = (i * i).mean(axis=(0, 2)), (q * q).mean(axis=(0, 2)), (i * q).mean(axis=(0, 2))
    g = np.sqrt(e_qq / e_ii)
    phi = np.arcsin(np.clip(-e_iq / np.sqrt(e_ii * e_qq), -1.0, 1.0))
    return np.column_stack([g, phi])
