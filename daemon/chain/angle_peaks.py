"""The angle FFT: beam power images on the zero-padded grid and their peaks (steps 2-4 of the
angle module doc), plus the coherence score the MIMO stage uses.

2. Grid: every channel belongs to one (iz, ix) cell of the VirtualGrid; redundant channels in one
   cell are averaged; the (optionally windowed) cell image is zero-padded to
   fft_size_elevation x fft_size_azimuth.
3. 2D zero-padded transform with kernel exp(+j 2 pi k n / N), so bin k maps to
   u = (lambda / pitch) * k / n_fft with k wrapped into [-n_fft/2, n_fft/2) (bin_direction_cosines):
   a batched numpy FFT along x (done by the caller on the rows scatter_cells fills), then a small
   DFT matrix along z (few rows) inside these kernels (power_image), which never materialise the
   full [n_fft_z, n_det, n_fft_x] image.
4. Local maxima of the beam power (8-neighbourhood, periodic) at visible grid points
   (u^2 + w^2 <= 1), at or above `peak_threshold_db` relative to the strongest visible grid
   point of the same snapshot; at most `max_peaks` per snapshot, strongest first (find_peaks).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["bin_direction_cosines", "scatter_cells", "power_image", "find_peaks", "coherence_scores"]


def bin_direction_cosines(n_fft: int, wavelength_m: float, pitch_m: float) -> np.ndarray:
    """Direction cosine of each bin of an n_fft-point transform over a grid of pitch `pitch_m`:
    (lambda / pitch) * k / n_fft with k wrapped into [-n_fft/2, n_fft/2) (float64[n_fft])."""
    k = np.arange(n_fft)
    k = np.where(k < (n_fft + 1) // 2, k, k - n_fft) if n_fft > 1 else k
    return (wavelength_m / pitch_m) * k / n_fft


@njit(cache=True)
def scatter_cells(x, weights, chan_iz, chan_ix, g):
    """g[iz, d, ix] = sum of weights[c] x[d, c] over the channels c in grid cell (iz, ix); zero
    elsewhere, including the zero padding of the rows."""
    nz, n, kx = g.shape
    for iz in range(nz):
        for d in range(n):
            for ix in range(kx):
                g[iz, d, ix] = 0
    for d in range(n):
        for c in range(x.shape[1]):
            g[chan_iz[c], d, chan_ix[c]] += weights[c] * x[d, c]


@njit(cache=True)
def power_image(fx, dft_z, d, power, acc_re, acc_im):
    """power[kz, kx] = |sum_iz dft_z[kz, iz] * fx[iz, d, kx]|^2: the z transform of one snapshot
    whose rows are already transformed along x (fx is [n_z rows, n_det, n_fft_x]). One output row
    at a time over all columns (acc_re, acc_im: float32 scratch of n_fft_x), so the inner loops
    vectorise; float32 sums of a few rows, the power in float64."""
    n_rows = fx.shape[0]
    nz = dft_z.shape[0]
    nx = fx.shape[2]
    for iz in range(nz):
        for ix in range(nx):
            acc_re[ix] = 0.0
            acc_im[ix] = 0.0
        for r in range(n_rows):
            cr = dft_z[iz, r].real
            ci = dft_z[iz, r].imag
            row = fx[r, d]
            for ix in range(nx):
                vr = row[ix].real
                vi = row[ix].imag
                acc_re[ix] += cr * vr - ci * vi
                acc_im[ix] += cr * vi + ci * vr
        out = power[iz]
        for ix in range(nx):
            re = np.float64(acc_re[ix])
            im = np.float64(acc_im[ix])
            out[ix] = re * re + im * im


@njit(cache=True)
def find_peaks(fx, dft_z, n_det, visible, rel_thr, max_peaks, power, acc_re, acc_im, out_det, out_iz, out_ix,
               out_pow):
    """Strongest `max_peaks` visible local maxima of the beam power per snapshot
    (8-neighbourhood, periodic; ties broken towards the lower flat index). Returns the number
    written."""
    nz = dft_z.shape[0]
    nx = fx.shape[2]
    dz_lo = -1 if nz > 1 else 0
    dz_hi = 1 if nz > 1 else 0
    dx_lo = -1 if nx > 1 else 0
    dx_hi = 1 if nx > 1 else 0
    top_p = np.empty(max_peaks, np.float64)
    top_z = np.empty(max_peaks, np.int64)
    top_x = np.empty(max_peaks, np.int64)
    count = 0
    for d in range(n_det):
        power_image(fx, dft_z, d, power, acc_re, acc_im)
        pmax = 0.0
        for iz in range(nz):
            for ix in range(nx):
                p = power[iz, ix]
                if visible[iz, ix] and p > pmax:
                    pmax = p
        if pmax <= 0.0:
            continue
        thr = pmax * rel_thr
        n_top = 0
        for iz in range(nz):
            for ix in range(nx):
                if not visible[iz, ix]:
                    continue
                p = power[iz, ix]
                if p < thr:
                    continue
                own = iz * nx + ix
                is_max = True
                for dz in range(dz_lo, dz_hi + 1):
                    jz = (iz + dz) % nz
                    for dx in range(dx_lo, dx_hi + 1):
                        jx = (ix + dx) % nx
                        other = jz * nx + jx
                        if other == own:
                            continue
                        q = power[jz, jx]
                        if q > p or (q == p and other < own):
                            is_max = False
                            break
                    if not is_max:
                        break
                if not is_max:
                    continue
                # insert into the descending top list
                if n_top < max_peaks:
                    k = n_top
                    n_top += 1
                elif p > top_p[max_peaks - 1]:
                    k = max_peaks - 1
                else:
                    continue
                while k > 0 and top_p[k - 1] < p:
                    top_p[k] = top_p[k - 1]
                    top_z[k] = top_z[k - 1]
                    top_x[k] = top_x[k - 1]
                    k -= 1
                top_p[k] = p
                top_z[k] = iz
                top_x[k] = ix
        for k in range(n_top):
            out_det[count] = d
            out_iz[count] = top_z[k]
            out_ix[count] = top_x[k]
            out_pow[count] = top_p[k]
            count += 1
    return count


@njit(cache=True)
def coherence_scores(fx, dft_z, n_det, visible_f, x, calibration, n_virt, power, acc_re, acc_im, out):
    """out[d] = max over visible grid points of the beam power image / (n_virt ||x_d c||^2), float32
    (0 for an all-zero snapshot); visible_f is the visibility mask as 0.0 / 1.0, c the calibration."""
    nz, nx = power.shape
    for d in range(n_det):
        energy = 0.0
        for c in range(x.shape[1]):
            y = x[d, c] * calibration[c]
            energy += np.float64(y.real) ** 2 + np.float64(y.imag) ** 2
        norm = n_virt * energy
        power_image(fx, dft_z, d, power, acc_re, acc_im)
        m = 0.0
        for iz in range(nz):
            for ix in range(nx):
                p = power[iz, ix] * visible_f[iz, ix]
                if p > m:
                    m = p
        out[d] = np.float32(m / norm) if norm > 0.0 else np.float32(0.0)
