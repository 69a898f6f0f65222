"""Range refinement on a band of cells around the detection (the range pass of refine.py).

The flat-taper estimate of refine.py needs every range bin of every channel's column: the inverse
FFT that gives back the samples reads the whole column, and a column is strided in the spectrum's
layout (rows run along Doppler), so reading it for every channel costs more than the rest of the
per-detection work together. Here the estimate uses only the M cells either side of the detection
(BAND_HALF_BINS unpadded bins), which carry nearly all of a windowed tone's information:

    y_c[k] = A_c W(k - nu) + noise,  k = k0 - M .. k0 + M,  noise covariance sigma_z^2 R,
    R[j, j'] = sum_n w_n^2 exp(-j 2 pi (j - j') n / N_fft),  W(x) = sum_n w_n exp(-j 2 pi x n / N_fft),

(y the Doppler-combined range spectrum of channel c, w the range window, sigma_z^2 the combined noise
per sample). The estimate maximises

    P(delta) = |u(delta)^H b|^2 / c(delta),   u = Q g,  c = g^H Q g,  g_j(delta) = W(j - M - delta),

over the fractional offset delta = nu - k0 (FFT bins), for one beam of the channels,
b = sum_c conj(v_c) y_c, v_c the channel values of the Doppler pass at this detection (the peak of
sum_c |u^H y_c|^2 and that of the beam agree to first order, as in refine.py's Newton steps).
With Q = R^-1 (the wide band, FLAT) this is the maximum-likelihood frequency of one tone of unknown
complex amplitude in this coloured Gaussian noise; next to a strong neighbour the narrow band
(WINDOWED: NARROW_HALF_BINS, Q = I, the window's own weighting) keeps the neighbour's energy out at
the price of a larger variance. u, c and what follows are tabulated at TABLE_STEPS points per FFT bin
from exact sums and read by cubic interpolation, so a tone alone and without noise is recovered
without bias (to the interpolation error, far below 1e-3 bin). The channel values are the amplitude
estimates A_c = u^H y_c / c at the refined offset (scaled to the flat taper's sum, as refine.py's).

Variance (the reported standard deviation), linearised at the truth (common practice): to first
order in an added signal e, P'(delta0) = Re(v^H e) with v = 2 u' + 2 ((u'^H g - c') / c) u, so for
noise e (covariance sigma_z^2 R) and the channels' SNR per sample S = sum_c |A_c|^2 / sigma_z^2,

    var(delta) = (v^H R v / 2) / (S P''^2)      (P'' of a unit tone's P at the truth),

which for Q = R^-1 is the Cramér-Rao bound of the band's data, 1 / (S J),
J = 2 Re(g'^H R^-1 g' - |g^H R^-1 g'|^2 / c) (Kay, "Fundamentals of Statistical Signal Processing:
Estimation Theory", 1993: the Fisher information of a signal in complex Gaussian noise with unknown
amplitude). S is estimated from the values, E |A_c_hat|^2 = |A_c|^2 + sigma_z^2 eta,
eta = u^H R u / c^2. A neighbouring tone i shifts the peak by Re(v^H i) / |P''| (the `slope` table,
per unit relative amplitude), which refine.py's choice of band and its reported sigma use. With the
Hann window and no padding (computed at build time, not measured): the wide band's variance is 1.05
to 1.10 x the full data's bound (Rife and Boorstyn 1974) and its values keep 0.98 of the full SNR;
the narrow band's variance is 4.5 x that bound, its neighbour shift below 1e-3 bin per unit
amplitude beyond 6 bins.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .prefetch import prefetch

BAND_HALF_BINS = 24     # unpadded bins either side of the detection that the range estimate reads
NARROW_HALF_BINS = 3    # the narrow band, next to a strong neighbour: the window's main lobe and one bin more
SEARCH_BINS = 1.0       # FFT bins either side of the detection cell that the search covers
TABLE_STEPS = 64        # table points per FFT bin
TAU_FRACTION = 0.001    # as refine.py's flat taper
PREFETCH_AHEAD = 3       # band rows read ahead of the one in use
COARSE = 4              # the first scan reads every COARSE-th table point
FINE_STEPS = 3          # parabolic steps on the interpolated likelihood after the scan


class Band:
    """The tables of one band (window w of n samples, FFT size N_fft, half_bins unpadded bins either
    side of the cell; `whiten`: the maximum-likelihood weighting Q = R^-1, else Q = I): u = Q g,
    c = g^H Q g, the variance per unit SNR, the noise factor eta of the values and the neighbour
    slope, at TABLE_STEPS points per FFT bin from exact sums (module doc)."""

    def __init__(self, window: np.ndarray, fft_size: int, half_bins: int, whiten: bool = True):
        w = np.asarray(window, np.float64)
        n = w.shape[0]
        self.fft_size = int(fft_size)
        padding = self.fft_size / n
        self.half = min(int(math.ceil(half_bins * padding)), (self.fft_size - 1) // 2)
        b = 2 * self.half + 1
        self.cells = b
        j = np.arange(b)
        d = np.subtract.outer(j, j)
        idx = np.arange(n)
        self._w, self._idx = w, idx
        self._cov = np.exp(-2j * np.pi * d[..., None] * idx / self.fft_size) @ (w * w)
        if whiten:
            # with white noise of TAU_FRACTION of the window's peak added per cell (per sample of the
            # FFT's length: without padding, noise of that size added to every sample): it keeps R
            # invertible to well within float32 data (a window's near-zero edge samples and, with
            # zero padding, the nearly dependent cells carry almost nothing). The variance below is
            # that of this estimate under the true R.
            tau = TAU_FRACTION * float(np.max(w))
            self._q = np.linalg.pinv(self._cov + tau * tau * n * np.eye(b), hermitian=True)
        else:
            self._q = np.eye(b)
        reach = SEARCH_BINS + 3.0 / TABLE_STEPS
        self.first = -reach
        self.n_table = int(round(2 * reach * TABLE_STEPS)) + 1
        self.offsets = self.first + np.arange(self.n_table) / TABLE_STEPS
        self.steps = float(TABLE_STEPS)
        g, _ = self._response(self.offsets)
        self.u = np.ascontiguousarray(g @ self._q.T)
        self.c = np.einsum("tb,tb->t", g.conj(), self.u).real
        v, p2 = self._linearised(self.offsets)
        self.var_unit = np.einsum("tb,bq,tq->t", v.conj(), self._cov, v).real / 2.0 / p2 ** 2
        self.eta = np.einsum("tb,bq,tq->t", self.u.conj(), self._cov, self.u).real / self.c ** 2
        self.slope = self._neighbour_slope()

    def _response(self, delta):
        """g_j(delta) = W(j - M - delta) and its derivative in delta, [len(delta), cells], for offsets
        on the table's grid (multiples of 1 / TABLE_STEPS): read from W and W' on that grid, exact sums
        by one zero-padded FFT each (W(m / L) = sum_n w_n exp(-j 2 pi m n / (L N_fft)), L = TABLE_STEPS)."""
        if not hasattr(self, "_grid"):
            size = TABLE_STEPS * self.fft_size
            self._grid = (np.fft.fft(self._w, size), np.fft.fft(self._w * (2j * np.pi * self._idx / self.fft_size), size))
        x = (np.arange(self.cells)[None, :] - self.half) - np.asarray(delta, np.float64)[:, None]
        m = np.rint(x * TABLE_STEPS).astype(np.int64) % (TABLE_STEPS * self.fft_size)
        return self._grid[0][m], self._grid[1][m]

    def _linearised(self, delta):
        """For a unit tone at each offset delta0: v with P'(delta0) = Re(v^H e) to first order in an
        added signal e, and P''(delta0) (a central difference on the exact response)."""
        q, h = self._q, 1.0 / TABLE_STEPS   # the second difference's relative error ~ h^2: below 1e-3
        delta = np.asarray(delta, np.float64)
        g0, dg0 = self._response(delta)
        u0, du0 = g0 @ q.T, dg0 @ q.T
        c0 = np.einsum("tb,tb->t", g0.conj(), u0).real
        m0 = np.einsum("tb,tb->t", du0.conj(), g0)                 # u0'^H g0
        pm = []
        for sign in (-1.0, 1.0):
            g, _ = self._response(delta + sign * h)
            u = g @ q.T
            c = np.einsum("tb,tb->t", g.conj(), u).real
            pm.append((np.abs(np.einsum("tb,tb->t", u.conj(), g0)) ** 2 / c, c))
        dc0 = (pm[1][1] - pm[0][1]) / (2.0 * h)
        p2 = (pm[0][0] - 2.0 * c0 + pm[1][0]) / (h * h)             # P(delta0) = c0
        v = 2.0 * du0 + 2.0 * ((m0 - dc0) / c0)[:, None] * u0
        return v, p2

    def _neighbour_slope(self) -> np.ndarray:
        """slope[d]: the peak shift (FFT bins) per unit relative amplitude of a neighbouring tone
        d - 1/2 .. d + 1/2 FFT bins away (its largest there), the amplitude of the shift's
        dependence on the neighbour's phase: |v^H i| / |P''| at the truth (linearised, common
        practice), i the neighbour's response in the band's cells."""
        v, p2 = self._linearised(np.zeros(1))
        n_d = self.fft_size // 2 + 1
        fine = np.arange(-4, 8 * (n_d - 1) + 5) / 8.0
        i, _ = self._response(-fine)
        shift = np.abs(i @ v[0].conj()) / abs(p2[0])
        return np.array([shift[8 * k: 8 * k + 9].max() for k in range(n_d)])


@numba.njit(cache=True, nogil=True)
def band_gather(spec, k0, l0, h, halves, n_range_fft, out):
    """out[i, c, b] = sum_j conj(h[i, j]) S_c[k0_i + b - M_i, l0_i + j - J//2], b = 0 .. 2 M_i
    (M_i = halves[i]); range bins beyond the kept ones follow from the Hermitian symmetry of real
    data, S[N - k, -l] = conj(S[k, l]) (the Nyquist bin, not kept, is 0); with complex sampling the
    range axis is circular. The row PREFETCH_AHEAD cells ahead is prefetched (prefetch.py). The
    channel (rx, slot) and the range bin advance by counting, without integer divisions (a division
    per cell took a third of the time), and where the Doppler columns do not wrap they are read
    straight (unsigned indices: no wrap-around test)."""
    n_rx, n_slots, n_bins, n_dop = spec.shape
    n_det, n_j = h.shape
    half_j = n_j // 2
    cols = np.empty(n_j, np.int64)
    mirror = np.empty(n_j, np.int64)
    wts = np.empty(n_j, np.complex64)
    for i in range(n_det):
        half = halves[i]
        n_b = 2 * half + 1
        for j in range(n_j):
            cols[j] = (l0[i] + j - half_j) % n_dop
            mirror[j] = (n_dop - cols[j]) % n_dop
            wts[j] = np.complex64(np.conj(h[i, j]))
        c0 = cols[0]
        straight = c0 + n_j <= n_dop
        k_first = (k0[i] - half) % n_range_fft
        c = 0
        for rx in range(n_rx):
            for sl in range(n_slots):
                # rows ahead past this channel's last are the next channel's first ones
                nrx, nsl = rx, sl + 1
                if nsl == n_slots:
                    nrx, nsl = rx + 1, 0
                k = k_first
                ka = k_first + PREFETCH_AHEAD
                if ka >= n_range_fft:
                    ka -= n_range_fft
                for b in range(n_b):
                    ahead = b + PREFETCH_AHEAD
                    if ka < n_bins and (ahead < n_b or nrx < n_rx):
                        row_a = spec[rx, sl, ka] if ahead < n_b else spec[nrx, nsl, ka]
                        prefetch(row_a, cols[0])
                        prefetch(row_a, cols[n_j - 1])
                    acc = np.complex64(0.0)
                    if k < n_bins:
                        src = spec[rx, sl, k]
                        if straight:
                            for j in range(n_j):
                                acc += wts[j] * src[numba.uint64(c0 + j)]
                        else:
                            for j in range(n_j):
                                acc += wts[j] * src[cols[j]]
                    elif n_range_fft - k < n_bins:
                        src = spec[rx, sl, n_range_fft - k]
                        for j in range(n_j):
                            acc += wts[j] * np.conj(src[mirror[j]])
                    out[i, c, b] = acc
                    k += 1
                    if k == n_range_fft:
                        k = 0
                    ka += 1
                    if ka == n_range_fft:
                        ka = 0
                    if ahead + 1 == n_b:
                        ka = k_first
                c += 1


@numba.njit(cache=True, nogil=True)
def _interp(table, first, steps, delta, out):
    """out = the table's row at delta, cubic (Catmull-Rom) interpolation between rows."""
    x = (delta - first) * steps
    k = min(max(int(np.floor(x)), 1), table.shape[0] - 3)
    f = x - k
    a0 = -0.5 * f * (1 - f) ** 2
    a1 = 1 - 2.5 * f * f + 1.5 * f ** 3
    a2 = 0.5 * f * (1 + 4 * f - 3 * f * f)
    a3 = -0.5 * f * f * (1 - f)
    for q in range(out.shape[0]):
        out[q] = a0 * table[k - 1, q] + a1 * table[k, q] + a2 * table[k + 1, q] + a3 * table[k + 2, q]


@numba.njit(cache=True, nogil=True)
def _interp1(v, first, steps, delta):
    x = (delta - first) * steps
    k = min(max(int(np.floor(x)), 1), v.shape[0] - 3)
    f = x - k
    return (-0.5 * f * (1 - f) ** 2 * v[k - 1] + (1 - 2.5 * f * f + 1.5 * f ** 3) * v[k]
            + 0.5 * f * (1 + 4 * f - 3 * f * f) * v[k + 1] - 0.5 * f * f * (1 - f) * v[k + 2])


@numba.njit(cache=True, nogil=True)
def _likelihood(u, c, first, steps, delta, beam, scratch):
    _interp(u, first, steps, delta, scratch)
    acc = np.complex128(0.0)
    for q in range(beam.shape[0]):
        acc += np.conj(scratch[q]) * beam[q]
    return (acc.real ** 2 + acc.imag ** 2) / max(_interp1(c, first, steps, delta), 1e-300)


@numba.njit(cache=True, nogil=True)
def band_refine(y, weights, mode, flat, u, c, var_unit, eta, first, steps, start, scale, sigma_z2, nu_out, values,
                var_out, eta_out, s_out):
    """For the detections in mode `flat`: the offset (FFT bins from the cell) maximising the beam's
    likelihood P (module doc), by a scan of every COARSE-th table point within SEARCH_BINS of the
    cell, then FINE_STEPS parabolic steps on the interpolated likelihood; the channel values
    scale * u^H y_c / c there, the variance per unit SNR and eta there, and the SNR per sample summed
    over the channels S with the noise bias removed (it may come out <= 0 at very low SNR; the caller
    floors it). `start` is the cell (FFT bins), `weights[i, c]` the beam's channel weights
    (conjugated here)."""
    n_det, n_ch = y.shape[0], y.shape[1]
    n_b = u.shape[1]   # the first n_b cells of each row of y
    beam = np.empty(n_b, np.complex128)
    scratch = np.empty(n_b, np.complex128)
    n_t = u.shape[0]
    for i in range(n_det):
        if mode[i] != flat:
            continue
        for q in range(n_b):
            beam[q] = 0.0
        for ch in range(n_ch):
            wc = np.conj(weights[i, ch])
            for q in range(n_b):
                beam[q] += wc * y[i, ch, q]
        # coarse scan on table rows (no interpolation), within SEARCH_BINS of the cell
        best_t, best_p = -1, -1.0
        for t in range(2, n_t - 2, COARSE):
            acc = np.complex128(0.0)
            for q in range(n_b):
                acc += np.conj(u[t, q]) * beam[q]
            p = (acc.real ** 2 + acc.imag ** 2) / max(c[t], 1e-300)
            if p > best_p:
                best_p, best_t = p, t
        delta = first + best_t / steps
        h = COARSE / steps
        lo_lim = first + 2.0 / steps
        hi_lim = first + (n_t - 3) / steps
        for _ in range(FINE_STEPS):
            p0 = _likelihood(u, c, first, steps, delta, beam, scratch)
            pm = _likelihood(u, c, first, steps, max(delta - h, lo_lim), beam, scratch)
            pp = _likelihood(u, c, first, steps, min(delta + h, hi_lim), beam, scratch)
            den = pm - 2.0 * p0 + pp
            if den < 0.0:
                step = 0.5 * h * (pm - pp) / den
                step = min(max(step, -h), h)
            else:
                step = h if pp > pm else -h
            delta = min(max(delta + step, lo_lim), hi_lim)
            h = max(h * 0.125, 1e-4 / steps)
        _interp(u, first, steps, delta, scratch)
        cd = max(_interp1(c, first, steps, delta), 1e-300)
        power = 0.0
        for ch in range(n_ch):
            acc = np.complex128(0.0)
            for q in range(n_b):
                acc += np.conj(scratch[q]) * y[i, ch, q]
            a = acc / cd
            power += a.real ** 2 + a.imag ** 2
            values[i, ch] = a * scale
        nu_out[i] = start[i] + delta
        var_out[i] = _interp1(var_unit, first, steps, delta)
        e = _interp1(eta, first, steps, delta)
        eta_out[i] = e
        # E sum_c |A_c_hat|^2 = sum_c |A_c|^2 + K sigma_z^2 eta
        s_out[i] = (power - n_ch * sigma_z2[i] * e) / sigma_z2[i]


@numba.njit(cache=True, nogil=True)
def band_pass(spec, k0, l0, h, mode, n_range_fft, weights, wide, narrow, scale, sigma_z2, s_first, bias, extra_floor,
              padding, y, nu, values, sigma, value_snr):
    """The whole range pass after the choice of band, in one call: the gather (band_gather) on each
    detection's band (mode 0: the wide band, 1: the narrow one), band_refine with that band's
    tables, then the standard deviation (FFT bins: the band's variance at the estimated SNR, the
    predicted neighbour shift `bias` and the systematic floor `extra_floor`, unpadded bins, in
    quadrature) and the SNR per channel of the values. `wide`, `narrow`: (u, c, var_unit, eta,
    first, steps, half) of each band."""
    n_det = k0.shape[0]
    halves = np.empty(n_det, np.int64)
    for i in range(n_det):
        halves[i] = wide[6] if mode[i] == 0 else narrow[6]
    band_gather(spec, k0, l0, h, halves, n_range_fft, y)
    start = np.empty(n_det)
    for i in range(n_det):
        start[i] = k0[i]
    var_unit, eta, s_hat = np.empty(n_det), np.empty(n_det), np.empty(n_det)
    band_refine(y, weights, mode, 0, wide[0], wide[1], wide[2], wide[3], wide[4], wide[5], start, scale, sigma_z2,
                nu, values, var_unit, eta, s_hat)
    band_refine(y, weights, mode, 1, narrow[0], narrow[1], narrow[2], narrow[3], narrow[4], narrow[5], start, scale,
                sigma_z2, nu, values, var_unit, eta, s_hat)
    n_ch = values.shape[1]
    for i in range(n_det):
        s = max(s_hat[i], 1e-3 * s_first[i] + 1e-12)
        sigma[i] = np.sqrt(var_unit[i] / s + (bias[i] * bias[i] + extra_floor * extra_floor) * padding * padding)
        value_snr[i] = s / n_ch / eta[i]
