"""Per-detection refinement of the range and Doppler frequencies, and the channel values there.

A detection is a cell (k0, l0) of the windowed spectrum S_c[k, l] (channel c = (rx, slot), range
bin k, unshifted Doppler column l). Its frequencies are refined on the detection's own data, one
dimension at a time (Doppler first, then range), and the channel values are taken at the refined
frequencies, so that neither the straddle loss nor, where the neighbourhood allows, the windows'
processing loss is paid by what follows (the MIMO decoding and the angle estimate).

The Doppler pass runs on whole Doppler rows (contiguous in the spectrum), steps 1 to 4 below. The
range pass runs on a band of range cells around the detection instead (refine_band.py: the
maximum-likelihood tone on the band's cells, or on a narrow band next to a strong neighbour),
because a whole range column is strided in the spectrum and reading it for every channel costs
more than all the rest; its Doppler combination (step 1) sums DOPPLER_COMBINED_CELLS cells. The
mode names below, FLAT and WINDOWED, stand on the range axis for the wide and the narrow band; the
choice between them (step 3, "Strong neighbour") is the same, with each band's own variance and
neighbour shift.

1. Combine across the other dimension: the COMBINED_CELLS cells around the detection along the other axis
   are summed with the weights that maximise the target's SNR, h = R^-1 g, with g the window's
   response to a tone at the current fractional offset and R the covariance of white noise after
   the window (the matched filter in coloured noise, common practice). What remains is one
   windowed transform along the dimension being refined.
2. Back to samples: the inverse FFT of that combined row gives w[n] z_c[n], the window times a
   tone in white noise (exactly: the FFTs are linear and z is taken along one axis only).
3. Taper: the samples are weighted by the estimation taper e / w, where e = w^2 / (w^2 + tau^2)
   is flat but for the extreme edges (tau = TAU_FRACTION of the window's peak keeps the inverse of
   the window bounded). The peak of the flat-tapered periodogram is the maximum-likelihood
   frequency of one tone in white noise and reaches the Cramér-Rao bound (Rife and Boorstyn,
   "Single-tone parameter estimation from discrete-time observations", IEEE Trans. IT, 1974).
   Its sidelobes are those of a rectangular window, though: next to a strong neighbour along this
   axis (judged from the detection map, below) the processing window is kept as the taper, e = w,
   whose low sidelobes keep the neighbour out at the price of a larger variance, reported as such.
4. Newton steps on sum_c |F_c(nu)|^2, F_c(nu) = sum_n e_n z_cn exp(-j 2 pi nu (n - m) / N_fft)
   (m the middle sample), started at the log-parabolic interpolation of the map.

Noiseless and alone, both tapers are symmetric, so the periodogram peaks exactly at the tone's
frequency: no interpolation bias at any fractional offset.

Variance (the reported standard deviation): for the peak of an e-tapered periodogram of a tone in
white noise, linearised at the truth (Rife and Boorstyn 1974 for e = 1; the tapered form is the
same calculation, common practice),
    var(omega) = sum_n e_n^2 t_n^2 / (2 S (sum_n e_n t_n^2)^2),  t_n = n - m, omega in rad/sample,
with S = sum_c |A_c|^2 / sigma_z^2 the SNR per sample summed over the channels, estimated from the
refined peak: E sum_c |F_c|^2 = S sigma_z^2 (sum e)^2 + K sigma_z^2 sum e^2. The noise power per raw
sample sigma^2 comes from the CFAR's noise estimate of the cell. A small floor for the residual
systematic error (SYSTEMATIC_FLOOR_BINS) is added in quadrature.

Strong neighbour: along the refined axis, a tone of relative amplitude rho at Delta unpadded bins
shifts the flat-taper peak by about 0.304 rho / Delta bins (the slope of sin(pi x) / (pi x) at an
integer, over its curvature pi^2 / 3 at 0). The map's excess over the noise and over the target's
own window response, summed over the axis, predicts that bias B. The flat taper is used when
sigma_flat^2 + B^2 < sigma_window^2 (the smaller expected squared error), and B is then added to
its reported sigma in quadrature.

Real sampling keeps only the lower half of the range bins; the upper half follows from the
Hermitian symmetry of the spectrum of real data, S[-k, -l] = conj(S[k, l]) (the Nyquist row, not
kept, is taken as zero).
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from .fft import ifft_unnormalised_inplace
from .refine_band import BAND_HALF_BINS, NARROW_HALF_BINS, Band, band_pass

TAU_FRACTION = 0.001          # the flat taper's edge: w^2 / (w^2 + tau^2), tau relative to max(w)
COMBINED_CELLS = 11           # range cells summed by the matched weights for the Doppler pass (odd; fewer on a short axis)
DOPPLER_COMBINED_CELLS = 11   # Doppler cells summed for the range pass (its band read makes more cells cheap)
NEWTON_STEPS = 3
SYSTEMATIC_FLOOR_BINS = 2e-4  # residual systematic error, unpadded bins, added in quadrature
NOISE_EXCESS = 4.0            # map cells above this many noise means count as a neighbour's energy
SIDELOBE_SLOPE = 0.304        # 3 / pi^2: peak shift per unit relative amplitude and bin of distance
FLAT, WINDOWED = 0, 1         # taper modes
SELF_SPAN = 16                # cells either side over which the neighbour test looks at the target's own response
TABLE_STEPS = 256             # samples per bin of the window response table


class Axis:
    """One axis of the cube as the refinement sees it: the processing window (length n, the data
    samples), the FFT size, and the two estimation tapers with their variance factors."""

    def __init__(self, window: np.ndarray, fft_size: int, combined: int = COMBINED_CELLS):
        w = np.asarray(window, np.float64)
        self.n = w.shape[0]
        self.fft_size = int(fft_size)
        self.window = w
        tau = TAU_FRACTION * float(np.max(w))
        flat = w * w / (w * w + tau * tau)
        self.effective = np.stack([flat, w])            # e_n per mode: what weights z
        # what multiplies the inverse-FFT samples w z: e / w (0 where the window is 0)
        # what multiplies the unnormalised inverse FFT's samples N_fft w z: e / (N_fft w), 0 where w is 0
        with np.errstate(divide="ignore", invalid="ignore"):
            self.taper = np.stack([np.where(w > 0, flat / w, 0.0), np.ones_like(w)]) / self.fft_size
        self.t = np.arange(self.n) - (self.n - 1) / 2.0
        e = self.effective
        self.sum_e = e.sum(axis=1)
        self.sum_e2 = (e * e).sum(axis=1)
        # var(omega) = var_factor / (2 S)
        self.var_factor = (e * e * self.t ** 2).sum(axis=1) / ((e * self.t ** 2).sum(axis=1)) ** 2
        self.padding = self.fft_size / self.n           # FFT bins per unpadded bin
        self.guard = int(np.ceil(2.0 * self.padding))   # the main lobe of the windows offered
        self.sum_w2 = float(np.sum(w * w))
        # cells of this axis that a combination across it sums: odd, at most the samples (R invertible)
        m = min(combined, self.n, self.fft_size)
        self.combined = m if m % 2 else m - 1
        # the window's amplitude response A(nu) = sum_n w_n cos(2 pi nu t_n / N_fft) on a fine grid
        # (W(nu) = exp(-j pi nu (n - 1) / N_fft) A(nu) for a symmetric window), read by interpolation
        self.table_reach = combined // 2 + SELF_SPAN + 2
        grid = np.arange(-self.table_reach * TABLE_STEPS, self.table_reach * TABLE_STEPS + 1) / TABLE_STEPS
        self.grid = grid
        # |a'| / |a''(0)| of the window's normalised amplitude response a = A / A(0), its largest
        # over d - 1/2 .. d + 1/2 for whole FFT bins d (exact sums): the peak shift per unit
        # amplitude of a neighbour about d bins away
        fine = np.arange(-4, 8 * (self.fft_size // 2) + 5) / 8.0
        arg = 2.0 * np.pi / self.fft_size
        slope = np.abs(np.sin(arg * np.multiply.outer(fine, self.t)) @ (w * arg * self.t))
        slope = slope / np.sum(w * (arg * self.t) ** 2)
        self.window_slope = np.array([slope[8 * d: 8 * d + 9].max() for d in range(self.fft_size // 2 + 1)])
        # the flat taper's (a rectangular window's) in the same units
        d = np.maximum(np.arange(self.fft_size // 2 + 1), 1)
        self.flat_slope = SIDELOBE_SLOPE * self.padding ** 2 / d
        self.table = np.cos(2.0 * np.pi * np.multiply.outer(grid, self.t) / self.fft_size) @ w

    def noise_covariance(self) -> np.ndarray:
        """Covariance of white noise (unit power per sample) in COMBINED_CELLS neighbouring bins after
        the window: R[j, j'] = sum_n w_n^2 exp(-j 2 pi (j - j') n / N_fft)."""
        n = np.arange(self.n)
        d = np.subtract.outer(np.arange(self.combined), np.arange(self.combined))
        return np.exp(-2j * np.pi * d[..., None] * n / self.fft_size) @ (self.window ** 2)



@numba.njit(cache=True, nogil=True)
def _gather(spec, k0, l0, h, n_range_fft, out):
    """out[i, c, :] = sum_j conj(h[i, j]) S_c[k0_i + j - J//2, :], the Doppler rows (contiguous) at the
    J range bins around the detection, channel c = rx * n_slots + slot. With real sampling a range
    bin k beyond the kept ones is conj(S[N_fft - k, -l]) (Hermitian symmetry); the Nyquist bin, not
    kept, is 0."""
    n_rx, n_slots, n_bins, n_dop = spec.shape
    n_det, n_j = h.shape
    half_j = n_j // 2
    for rx in range(n_rx):
        for s in range(n_slots):
            c = rx * n_slots + s
            for i in range(n_det):
                row = out[i, c]
                row[:] = 0.0
                for j in range(n_j):
                    wt = np.complex64(np.conj(h[i, j]))
                    k = (k0[i] + j - half_j) % n_range_fft
                    if k < n_bins:
                        src = spec[rx, s, k]
                        for q in range(n_dop):
                            row[q] += wt * src[q]
                    elif n_range_fft - k < n_bins:
                        src = spec[rx, s, n_range_fft - k]
                        for q in range(n_dop):
                            row[q] += wt * np.conj(src[(n_dop - q) % n_dop])


@numba.njit(cache=True, nogil=True)
def _phasors(nu, fft_size, t, ph):
    """ph[k] = exp(-j 2 pi nu t_k / N_fft) for evenly spaced t (a recurrence instead of n sines)."""
    w = 2.0 * np.pi * nu / fft_size
    step = complex(np.cos(w), -np.sin(w))
    ph[0] = complex(np.cos(w * t[0]), -np.sin(w * t[0]))
    for k in range(1, t.shape[0]):
        ph[k] = ph[k - 1] * step


@numba.njit(cache=True, nogil=True)
def _newton(samples, taper, mode, t, nu0, fft_size, max_step, n_steps, g, nu_out, values):
    """Peak of the channels' periodogram, F_c(nu) = sum_n taper[mode_i, n] samples[i, c, n]
    exp(-j 2 pi nu t_n / N_fft), by Newton steps from nu0 (FFT bins), each step at most max_step bins
    (a full step uphill where the curvature is not yet negative). The steps run on one beam,
    sum_c conj(F_c(nu0)) F_c(nu): its peak and that of sum_c |F_c(nu)|^2 agree to first order (the
    same gradient at nu0; for a symmetric taper and centred t each F_c is its amplitude times a real
    kernel), at 1/K of the cost. Writes nu_out[i] and values[i, c] = F_c(nu_out[i]). `samples`
    holds the first n = len(t) samples of each row; `g` is scratch [n_ch + 2, >= n]."""
    n_det, n_ch = samples.shape[0], samples.shape[1]
    n = t.shape[0]
    ph = g[n_ch]
    beam = g[n_ch + 1]
    for i in range(n_det):
        m = mode[i]
        for c in range(n_ch):
            for k in range(n):
                g[c, k] = samples[i, c, k] * taper[m, k]
        nu = nu0[i]
        _phasors(nu, fft_size, t, ph)
        for k in range(n):
            beam[k] = 0.0
        for c in range(n_ch):
            f0 = np.complex128(0.0)
            for k in range(n):
                f0 += g[c, k] * ph[k]
            wc = np.conj(f0)
            for k in range(n):
                beam[k] += wc * g[c, k]
        for step in range(n_steps):
            if step > 0:
                _phasors(nu, fft_size, t, ph)
            f0 = np.complex128(0.0)
            f1 = np.complex128(0.0)
            f2 = np.complex128(0.0)
            for k in range(n):
                tk = t[k]
                v = beam[k] * ph[k]
                f0 += v
                f1 += v * tk
                f2 += v * (tk * tk)
            # d/dw F = -j sum t v, d2/dw2 F = -sum t^2 v
            d1 = 2.0 * (np.conj(f0) * (-1j * f1)).real
            d2 = 2.0 * (abs(f1) ** 2 - (np.conj(f0) * f2).real)
            if d2 < 0.0:
                delta = -d1 / d2 * fft_size / (2.0 * np.pi)
            else:   # not yet in the peak's concave part (noise moved the start): climb by a full step
                delta = max_step if d1 > 0.0 else -max_step
            nu += min(max(delta, -max_step), max_step)
        _phasors(nu, fft_size, t, ph)
        for c in range(n_ch):
            f0 = np.complex128(0.0)
            for k in range(n):
                f0 += g[c, k] * ph[k]
            values[i, c] = f0
        nu_out[i] = nu


@numba.njit(cache=True, nogil=True)
def _amplitude(table, reach, nu):
    """A(nu) from the table (linear interpolation; nu within +-reach bins)."""
    x = (nu + reach) * TABLE_STEPS
    k = min(max(int(np.floor(x)), 0), table.shape[0] - 2)
    f = x - k
    return table[k] * (1.0 - f) + table[k + 1] * f


@numba.njit(cache=True, nogil=True)
def _response(table, reach, n, fft_size, nu):
    """W(nu) = sum_n w_n exp(-j 2 pi nu n / N_fft) of a symmetric window of n samples."""
    a = -np.pi * nu * (n - 1) / fft_size
    return _amplitude(table, reach, nu) * complex(np.cos(a), np.sin(a))


@numba.njit(cache=True, nogil=True)
def _weights(table, reach, n_other, other_fft, rinv, offset, h, gain):
    """Matched weights over the other axis: g_j = W(j - J//2 - offset_i), h_i = R^-1 g_i, and the
    SNR gain g^H R^-1 g (per unit raw SNR)."""
    n_j = rinv.shape[0]
    g = np.empty(n_j, np.complex128)
    for i in range(offset.shape[0]):
        for j in range(n_j):
            g[j] = _response(table, reach, n_other, other_fft, j - n_j // 2 - offset[i])
        acc = 0.0
        for j in range(n_j):
            v = complex(0.0, 0.0)
            for q in range(n_j):
                v += rinv[j, q] * g[q]
            h[i, j] = v
            acc += (np.conj(g[j]) * v).real
        gain[i] = max(acc, 1e-30)


@numba.njit(cache=True, nogil=True)
def _self_response(table, reach, offset, out):
    """out[i, d + span] = |W(d - offset_i)|^2 / |W(-offset_i)|^2 for d = -span..span: the target's
    own window response across its neighbours, relative to its cell."""
    span = out.shape[1] // 2
    for i in range(offset.shape[0]):
        p0 = max(_amplitude(table, reach, -offset[i]) ** 2, 1e-300)
        for d in range(-span, span + 1):
            out[i, d + span] = _amplitude(table, reach, d - offset[i]) ** 2 / p0


@numba.njit(cache=True, nogil=True)
def _neighbour_bias(power, k0, col, along_range, p_self, noise, guard, padding, flat_slope, window_slope, bias_flat,
                    bias_window):
    """Predicted peak shift (unpadded bins) from the map's energy along the refined axis, for each
    taper: a neighbour of relative amplitude rho at Delta FFT bins moves the peak of |F|^2 by at most
    rho |a'(Delta)| / |a''(0)| (a the taper's normalised amplitude response; the linearised peak,
    common practice): for the flat taper, a rectangular window, that is SIDELOBE_SLOPE rho / Delta
    unpadded bins (flat_slope); for the window, window_slope[|Delta|] (FFT bins). rho = sqrt(excess / P0) at each
    peak of the map along the axis beyond the main lobe (one term per neighbour), excess = cell - NOISE_EXCESS noise - 2 x the target's own window response
    there (p_self, relative to P0); the result is the RMS over the neighbour's phase. `col` is the
    detection's map column (shifted). flat_slope and window_slope: the shift per unit rho of each
    estimate at |Delta| FFT bins (FFT bins; on the range axis the two bands' own, refine_band.py)."""
    n_r, n_d = power.shape
    half = p_self.shape[1] // 2
    for i in range(k0.shape[0]):
        p0 = max(np.float64(power[k0[i], col[i]]), 1e-30)
        n_axis = n_r if along_range else n_d
        centre = k0[i] if along_range else col[i]
        bf = 0.0
        bw = 0.0
        for q in range(n_axis):
            d = q - centre
            if not along_range:   # Doppler is circular
                if d > n_d // 2:
                    d -= n_d
                elif d < -(n_d // 2):
                    d += n_d
            if abs(d) <= guard:
                continue
            if along_range:
                p = np.float64(power[q, col[i]])
                lo = np.float64(power[q - 1, col[i]]) if q > 0 else 0.0
                hi = np.float64(power[q + 1, col[i]]) if q < n_r - 1 else 0.0
            else:
                p = np.float64(power[k0[i], q])
                lo = np.float64(power[k0[i], (q - 1) % n_d])
                hi = np.float64(power[k0[i], (q + 1) % n_d])
            if p < lo or p < hi:   # one term per neighbour: at its peak along the axis
                continue
            own = p_self[i, d + half] * p0 if abs(d) <= half else 0.0
            excess = p - NOISE_EXCESS * noise[i] - 2.0 * own
            if excess > 0.0:
                rho = np.sqrt(excess / p0)
                bf += rho * flat_slope[min(abs(d), flat_slope.shape[0] - 1)] / padding
                bw += rho * window_slope[min(abs(d), window_slope.shape[0] - 1)] / padding
        # RMS over the neighbour's unknown phase: the shift goes as cos(phase), E cos^2 = 1/2
        bias_flat[i] = bf * np.sqrt(0.5)
        bias_window[i] = bw * np.sqrt(0.5)


@numba.njit(cache=True, nogil=True)
def _decide(power, k0, col, along_range, table, reach, offset, noise_cell, s_first, flat_factor, win_factor, guard,
            padding, flat_slope, window_slope, p_self, bias_window, bias, mode):
    """Per detection: the target's own response across SELF_SPAN cells (p_self scratch), the
    predicted neighbour shift of each taper (unpadded bins), and the taper with the smaller expected
    squared error, variance plus shift^2; bias[i] is the chosen taper's predicted shift.
    flat_factor[i], win_factor[i]: each estimate's variance times the SNR S, unpadded bins^2."""
    _self_response(table, reach, offset, p_self)
    _neighbour_bias(power, k0, col, along_range, p_self, noise_cell, guard, padding, flat_slope, window_slope,
                    bias, bias_window)
    for i in range(k0.shape[0]):
        s = max(s_first[i], 1e-12)
        var_flat = flat_factor[i] / s
        var_win = win_factor[i] / s
        if var_flat + bias[i] * bias[i] < var_win + bias_window[i] * bias_window[i]:
            mode[i] = FLAT
        else:
            mode[i] = WINDOWED
            bias[i] = bias_window[i]


@numba.njit(cache=True, nogil=True)
def _finish(values, mode, sum_e, sum_e2, var_factor, sigma_z2, s_first, bias, fft_size, padding, sigma_out,
            snr_out):
    """From the refined peaks: the SNR per sample summed over the channels (noise bias removed,
    E sum_c |F_c|^2 = S sigma_z^2 (sum e)^2 + K sigma_z^2 sum e^2), the standard deviation in FFT bins
    (the tapered-periodogram variance, the neighbour bias and the systematic floor in quadrature) and
    the SNR per channel of the values."""
    n_det, n_ch = values.shape
    for i in range(n_det):
        m = mode[i]
        peak = 0.0
        for c in range(n_ch):
            peak += values[i, c].real ** 2 + values[i, c].imag ** 2
        s1, s2 = sum_e[m], sum_e2[m]
        s_hat = max((peak / sigma_z2[i] - n_ch * s2) / (s1 * s1), 1e-3 * s_first[i] + 1e-12)
        sd = np.sqrt(var_factor[m] / (2.0 * s_hat)) * fft_size / (2.0 * np.pi)
        extra = (bias[i] * bias[i] + SYSTEMATIC_FLOOR_BINS * SYSTEMATIC_FLOOR_BINS) * padding * padding
        sigma_out[i] = np.sqrt(sd * sd + extra)
        snr_out[i] = s_hat / n_ch * s1 * s1 / s2


@numba.njit(cache=True, nogil=True)
def _doppler_prepare(spec, power, range_bin, doppler_col, range_frac, doppler_frac, cell_noise, cell_snr, n_ch,
                     r_sum_w2, d_sum_w2, r_grid, r_table, r_reach, r_n, r_fft, d_grid, d_table, d_reach, d_fft,
                     d_guard, d_padding, d_flat_slope, d_window_slope, d_flat_factor, d_win_factor, cov_r,
                     k0, col, l0, dr, dd, noise_cell, sigma2, snr_raw, nu0, offset, h, gain, sigma_z2, s_first,
                     flat_factor, win_factor, p_self, bias_window, bias, mode, rows):
    """Refiner.refine up to the Doppler pass's inverse FFT, in one call: the detections' cells and
    starting offsets as float64, the noise per raw sample and the raw SNR, the matched weights over
    the range cells, the choice of taper and the Doppler rows combined (_gather). Every output is a
    buffer of the caller's (the first n_det entries)."""
    n_det = range_bin.shape[0]
    half = d_fft // 2
    den = n_ch * r_sum_w2 * d_sum_w2
    for i in range(n_det):
        k0[i] = range_bin[i]
        col[i] = doppler_col[i]
        l0[i] = (col[i] - half) % d_fft
        dr[i] = range_frac[i]
        dd[i] = doppler_frac[i]
        noise_cell[i] = cell_noise[i]
        sigma2[i] = noise_cell[i] / den
    wr = np.interp(-dr[:n_det], r_grid, r_table)
    wd = np.interp(-dd[:n_det], d_grid, d_table)
    for i in range(n_det):
        snr_raw[i] = np.float64(cell_snr[i]) * r_sum_w2 * d_sum_w2 / (wr[i] ** 2 * wd[i] ** 2)
    _weights(r_table, r_reach, r_n, r_fft, cov_r, dr[:n_det], h[:n_det], gain[:n_det])
    for i in range(n_det):
        sigma_z2[i] = sigma2[i] * gain[i]
        s_first[i] = n_ch * snr_raw[i] * gain[i]
        nu0[i] = l0[i] + dd[i]
        offset[i] = nu0[i] - l0[i]
        flat_factor[i] = d_flat_factor
        win_factor[i] = d_win_factor
    _decide(power, k0[:n_det], col[:n_det], False, d_table, d_reach, offset[:n_det], noise_cell[:n_det],
            s_first[:n_det], flat_factor[:n_det], win_factor[:n_det], d_guard, d_padding, d_flat_slope,
            d_window_slope, p_self[:n_det], bias_window[:n_det], bias[:n_det], mode[:n_det])
    _gather(spec, k0[:n_det], l0[:n_det], h[:n_det], r_fft, rows[:n_det])


@numba.njit(cache=True, nogil=True)
def _doppler_finish_range_pass(n_det, spec, power, samples, n_ch, d_taper, d_t, d_fft, d_padding, d_sum_e, d_sum_e2,
                               d_var_factor, d_table, d_reach, d_n, cov_d, r_table, r_reach, r_fft, r_guard,
                               r_padding, r_sum_e_flat, wide_offsets, wide_var_unit, wide_slope, narrow_offsets,
                               narrow_var_unit, narrow_slope, wide, narrow, k0_buf, col_buf, l0_buf, dr, noise_buf,
                               sigma2, snr_raw, nu0_buf, offset_buf, h_buf, gain_buf, sz2_buf, sf_buf, ff_buf, wf_buf,
                               p_self_buf, bw_buf, bias_buf, mode_buf, scratch, values_buf, beam_buf, band_buf,
                               nu_d_buf, sigma_d_buf, mode_d, nu_r_buf, sigma_r_buf, snr_buf, mode_r, tmp_snr):
    """Refiner.refine after the Doppler pass's inverse FFT of `samples` [n_det, K, n], in one call: the
    Doppler pass's Newton steps and variance (_newton, _finish), then the range pass on the band (the
    matched weights over the Doppler cells at the refined Doppler offset, the choice of band,
    band_pass); the Doppler frequency last put on [-N/2, N/2). The first n_det entries of each
    buffer are used; values: the range pass's channel values (the Doppler pass's are kept in beam,
    its weights)."""
    k0, col, l0, noise_cell = k0_buf[:n_det], col_buf[:n_det], l0_buf[:n_det], noise_buf[:n_det]
    nu0, offset, h, gain = nu0_buf[:n_det], offset_buf[:n_det], h_buf[:n_det], gain_buf[:n_det]
    sigma_z2, s_first, flat_factor, win_factor = sz2_buf[:n_det], sf_buf[:n_det], ff_buf[:n_det], wf_buf[:n_det]
    p_self, bias_window, bias, mode = p_self_buf[:n_det], bw_buf[:n_det], bias_buf[:n_det], mode_buf[:n_det]
    values, beam, band_rows = values_buf[:n_det], beam_buf[:n_det], band_buf[:n_det]
    nu_d, sigma_d, nu_r, sigma_r, value_snr = (nu_d_buf[:n_det], sigma_d_buf[:n_det], nu_r_buf[:n_det],
                                               sigma_r_buf[:n_det], snr_buf[:n_det])
    _newton(samples, d_taper, mode, d_t, nu0, d_fft, 0.5 * d_padding, NEWTON_STEPS, scratch, nu_d, values)
    _finish(values, mode, d_sum_e, d_sum_e2, d_var_factor, sigma_z2, s_first, bias, d_fft, d_padding, sigma_d,
            tmp_snr[:n_det])
    for i in range(n_det):
        mode_d[i] = mode[i]
        for c in range(n_ch):
            beam[i, c] = values[i, c]
        offset[i] = nu_d[i] - l0[i]
    _weights(d_table, d_reach, d_n, d_fft, cov_d, offset, h, gain)
    for i in range(n_det):
        sigma_z2[i] = sigma2[i] * gain[i]
        s_first[i] = n_ch * snr_raw[i] * gain[i]
        nu0[i] = k0[i] + dr[i]
        offset[i] = nu0[i] - k0[i]
    ff = np.interp(offset, wide_offsets, wide_var_unit)
    wf = np.interp(offset, narrow_offsets, narrow_var_unit)
    pad2 = r_padding ** 2
    for i in range(n_det):
        flat_factor[i] = ff[i] / pad2
        win_factor[i] = wf[i] / pad2
    _decide(power, k0, col, True, r_table, r_reach, offset, noise_cell, s_first, flat_factor, win_factor, r_guard,
            r_padding, wide_slope, narrow_slope, p_self, bias_window, bias, mode)
    band_pass(spec, k0, l0, h, mode, r_fft, beam, wide, narrow, r_sum_e_flat, sigma_z2, s_first, bias,
              SYSTEMATIC_FLOOR_BINS, r_padding, band_rows, nu_r, values, sigma_r, value_snr)
    half = d_fft // 2
    for i in range(n_det):
        mode_r[i] = mode[i]
        nu_d[i] = (nu_d[i] + half) % d_fft - half


@dataclass
class Refined:
    """Per detection: range and Doppler frequencies in FFT bins (range nu_r >= 0; Doppler nu_d in
    [-N/2, N/2) of the unshifted axis), their standard deviations (FFT bins), the channel values at
    both (complex128 [n_det, n_rx, n_slots]) with their SNR per channel, and the taper used on
    each axis (FLAT or WINDOWED)."""

    range_bin: np.ndarray
    doppler_bin: np.ndarray
    sigma_range_bins: np.ndarray
    sigma_doppler_bins: np.ndarray
    values: np.ndarray
    value_snr: np.ndarray
    range_mode: np.ndarray
    doppler_mode: np.ndarray


class Refiner:
    """Refinement of one sensor's detections (see the module docstring). Pure: buffers only."""

    def __init__(self, range_window: np.ndarray, range_fft_size: int, n_range_bins: int,
                 doppler_window: np.ndarray, doppler_fft_size: int, n_rx: int, n_slots: int):
        self.range = Axis(range_window, range_fft_size)
        self.doppler = Axis(doppler_window, doppler_fft_size, DOPPLER_COMBINED_CELLS)
        self.bands = (Band(range_window, range_fft_size, BAND_HALF_BINS),
                      Band(range_window, range_fft_size, NARROW_HALF_BINS, whiten=False))   # FLAT, WINDOWED
        self._band_tables = tuple((b.u, b.c, b.var_unit, b.eta, b.first, b.steps, b.half) for b in self.bands)
        self.n_range_bins = n_range_bins
        self.n_rx, self.n_slots = n_rx, n_slots
        self.n_channels = n_rx * n_slots
        self._cov = {name: np.linalg.pinv(ax.noise_covariance(), hermitian=True)
                     for name, ax in (("range", self.range), ("doppler", self.doppler))}
        # the Doppler pass's variance factors per taper (whole rows: the same for every detection), unpadded bins^2
        to_u2 = (self.doppler.fft_size / (2.0 * np.pi) / self.doppler.padding) ** 2
        self._doppler_flat_factor = float(self.doppler.var_factor[FLAT] / 2.0 * to_u2)
        self._doppler_win_factor = float(self.doppler.var_factor[WINDOWED] / 2.0 * to_u2)
        self._capacity = 0
        self._reserve(16)

    def _reserve(self, n_det: int) -> None:
        """Buffers for n_det detections (grown, never shrunk): the combined rows of each axis, the
        Newton scratch, the values."""
        if n_det <= self._capacity:
            return
        self._capacity = n = max(n_det, 2 * self._capacity)
        k = self.n_channels
        self._rows = np.zeros((n, k, self.doppler.fft_size), np.complex64)
        self._scratch = np.empty((k + 2, max(self.range.n, self.doppler.n)), np.complex128)
        self._values = np.empty((n, k), np.complex128)
        self._beam = np.empty((n, k), np.complex128)
        self._band_rows = np.zeros((n, k, self.bands[0].cells), np.complex64)
        self._h = {name: np.empty((n, ax.combined), np.complex128) for name, ax in (("range", self.range),
                                                                                     ("doppler", self.doppler))}
        self._gain = {name: np.empty(n) for name in ("range", "doppler")}
        self._mode = np.empty(n, np.int64)
        self._bias = np.empty(n)
        self._bias_window = np.empty(n)
        self._p_self = np.empty((n, 2 * SELF_SPAN + 1))
        self._buf = {name: np.empty(n, np.int64 if name in ("k0", "col", "l0", "mode_d", "mode_r") else np.float64)
                     for name in ("k0", "col", "l0", "dr", "dd", "noise", "sigma2", "snr_raw", "nu0", "offset",
                                  "sigma_z2", "s_first", "flat_factor", "win_factor", "nu_d", "sigma_d", "mode_d",
                                  "nu_r", "sigma_r", "value_snr", "mode_r", "tmp_snr")}

    # ---- both axes ---------------------------------------------------------------------------

    def refine(self, spec: np.ndarray, power: np.ndarray, range_bin: np.ndarray, doppler_col: np.ndarray,
               range_frac: np.ndarray, doppler_frac: np.ndarray, cell_noise: np.ndarray,
               cell_snr: np.ndarray) -> Refined:
        """spec: complex64 [rx, slot, range, doppler] (Doppler unshifted); power: the map (Doppler
        shifted); range_bin, doppler_col: the detections' cells (map indices, doppler_col shifted);
        range_frac, doppler_frac: the map's log-parabolic offsets (the starting points); cell_noise:
        the CFAR's noise mean of a cell (K * windowed per-channel noise power); cell_snr: the CFAR's
        per-channel SNR of the cell. Two compiled calls around the Doppler pass's inverse FFT (the
        module doc's steps: the Doppler pass on whole rows, then the range pass on the band). The
        returned arrays are the Refiner's buffers, valid until its next call."""
        n = len(range_bin)
        self._reserve(n)
        rng, dop, b = self.range, self.doppler, self._buf
        wide, narrow = self.bands
        _doppler_prepare(spec, power, range_bin, doppler_col, range_frac, doppler_frac, cell_noise, cell_snr,
                         self.n_channels, rng.sum_w2, dop.sum_w2, rng.grid, rng.table, float(rng.table_reach), rng.n,
                         rng.fft_size, dop.grid, dop.table, float(dop.table_reach), dop.fft_size, dop.guard,
                         dop.padding, dop.flat_slope, dop.window_slope, self._doppler_flat_factor,
                         self._doppler_win_factor, self._cov["range"], b["k0"], b["col"], b["l0"], b["dr"], b["dd"],
                         b["noise"], b["sigma2"], b["snr_raw"], b["nu0"], b["offset"], self._h["range"],
                         self._gain["range"], b["sigma_z2"], b["s_first"], b["flat_factor"], b["win_factor"],
                         self._p_self, self._bias_window, self._bias, self._mode, self._rows)
        samples = ifft_unnormalised_inplace(self._rows[:n], axis=-1)   # N_fft w z in the first n samples
        _doppler_finish_range_pass(
            n, spec, power, samples, self.n_channels, dop.taper, dop.t, float(dop.fft_size), dop.padding, dop.sum_e,
            dop.sum_e2, dop.var_factor, dop.table, float(dop.table_reach), dop.n, self._cov["doppler"], rng.table,
            float(rng.table_reach), rng.fft_size, rng.guard, rng.padding, float(rng.sum_e[FLAT]), wide.offsets,
            wide.var_unit, wide.slope, narrow.offsets, narrow.var_unit, narrow.slope, self._band_tables[0],
            self._band_tables[1], b["k0"], b["col"], b["l0"], b["dr"], b["noise"], b["sigma2"], b["snr_raw"], b["nu0"],
            b["offset"], self._h["doppler"], self._gain["doppler"], b["sigma_z2"], b["s_first"], b["flat_factor"],
            b["win_factor"], self._p_self, self._bias_window, self._bias, self._mode, self._scratch, self._values,
            self._beam, self._band_rows, b["nu_d"], b["sigma_d"], b["mode_d"], b["nu_r"], b["sigma_r"],
            b["value_snr"], b["mode_r"], b["tmp_snr"])
        return Refined(b["nu_r"][:n], b["nu_d"][:n], b["sigma_r"][:n], b["sigma_d"][:n],
                       self._values[:n].reshape(-1, self.n_rx, self.n_slots), b["value_snr"][:n], b["mode_r"][:n],
                       b["mode_d"][:n])
