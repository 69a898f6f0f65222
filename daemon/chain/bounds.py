"""Cramér-Rao bounds: the accuracy figures every point carries, in one place.

Tone (range and velocity). For a tone of N samples with per-sample SNR s in white noise the bound
on its frequency in bins of the unpadded DFT is var(k) = 6 N^2 / ((2 pi)^2 s N (N^2 - 1)) (Rife and
Boorstyn, "Single-tone parameter estimation from discrete-time observations", IEEE Trans. IT, 1974);
integrated over K channels of equal SNR, var(k) = 6 / ((2 pi)^2 K s (1 - 1/N^2)). Its phase, with
the frequency known, has var(phase) = 1 / (2 N s) rad^2 (the same paper).

Direction (azimuth and elevation). One far-field source with unknown complex amplitude in white
noise (deterministic model of Stoica and Nehorai, "MUSIC, maximum likelihood, and Cramér-Rao
bound", IEEE Trans. ASSP, 1989): the Fisher matrix of the direction cosines (u, w) after
eliminating the amplitude is F = 2 SNR k0^2 sum_i (q_i - q_mean)(q_i - q_mean)^T with q_i = (x_i, z_i)
the element positions and SNR = |a|^2 / sigma^2 per channel. Azimuth and elevation follow through
the Jacobians of az = atan2(u, v), el = asin(w), v = sqrt(1 - u^2 - w^2).

The scalar forms (tone_sigma_bins, direction_sigmas_deg) are compiled so the point kernel calls
them per point; the array functions below use the same code.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..errors import CubecastError

__all__ = [
    "tone_sigma_bins",
    "tone_crb_bins",
    "tone_phase_crb_rad",
    "direction_sigmas_deg",
    "crb_direction_cosine",
    "crb_unit_covariance",
    "sigma_azimuth_deg",
    "sigma_elevation_deg",
]


# --------------------------------------------------------------------------------------------
# tone (Rife and Boorstyn 1974)
# --------------------------------------------------------------------------------------------


@njit(cache=True, nogil=True, error_model="numpy")
def tone_sigma_bins(snr, n_channels, n_samples):
    """Cramér-Rao standard deviation of a tone's frequency in bins of the unpadded DFT, K =
    n_channels channels of equal per-channel SNR integrated: sqrt(6 / ((2 pi)^2 K snr (1 - 1/N^2))).
    snr is a float or a float64 array (> 0; the caller floors it)."""
    n = float(n_samples)
    return np.sqrt(6.0 / ((2.0 * np.pi) ** 2 * n_channels * snr * (1.0 - 1.0 / (n * n))))


def tone_crb_bins(snr_per_channel: np.ndarray, n_channels: int, n_samples: int) -> np.ndarray:
    """Cramér-Rao standard deviation of a tone's frequency in bins of the unpadded DFT
    (Rife and Boorstyn 1974), with K channels of equal SNR integrated (tone_sigma_bins over an
    array, SNR floored at 1e-12)."""
    snr = np.maximum(np.asarray(snr_per_channel, np.float64), 1e-12)
    return tone_sigma_bins(snr, int(n_channels), int(n_samples))


def tone_phase_crb_rad(snr, n_samples: int = 1):
    """Cramér-Rao standard deviation in radians of the phase of a tone of known frequency over
    n_samples samples of per-sample SNR snr (|a|^2 / sigma^2, sigma^2 the complex noise power):
    1 / sqrt(2 N snr) (Rife and Boorstyn 1974). One complex sample: 1 / sqrt(2 snr)."""
    return 1.0 / np.sqrt(2.0 * snr * n_samples)


# --------------------------------------------------------------------------------------------
# direction (Stoica and Nehorai 1989)
# --------------------------------------------------------------------------------------------


def _direction_cosine_covariance(positions_m, wavelength_m, snr_per_channel):
    """CRB covariance (var_u, var_w, cov_uw) for one source with unknown complex amplitude.

    Deterministic (conditional) model, white complex Gaussian noise: the Fisher matrix of (u, w)
    after eliminating the amplitude is F = 2 * SNR * k0^2 * sum_i (q_i - q_mean)(q_i - q_mean)^T,
    q_i = (x_i, z_i), SNR = |a|^2 / sigma^2 per channel. Unidentifiable directions (no extent)
    get infinite variance.
    """
    pos = np.asarray(positions_m, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3 or pos.shape[0] < 1:
        raise CubecastError(f"positions_m: expected shape (n_virt, 3), got {pos.shape}")
    if not (math.isfinite(wavelength_m) and wavelength_m > 0):
        raise CubecastError(f"wavelength_m must be a finite number > 0, got {wavelength_m!r}")
    k0 = 2.0 * np.pi / wavelength_m
    q = pos[:, [0, 2]] - pos[:, [0, 2]].mean(axis=0)
    g = k0 * k0 * (q.T @ q)  # geometry part of the Fisher matrix
    gxx, gzz, gxz = g[0, 0], g[1, 1], g[0, 1]
    scale = k0 * k0 * wavelength_m * wavelength_m * 1e-12  # relative zero for extents
    snr = np.asarray(snr_per_channel, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        two_snr = np.where(snr > 0, 2.0 * snr, 0.0)
        det = gxx * gzz - gxz * gxz
        has_x = gxx > scale
        has_z = gzz > scale
        if has_x and has_z and det > scale * max(gxx, gzz):
            var_u = gzz / det / two_snr
            var_w = gxx / det / two_snr
            cov = -gxz / det / two_snr
        elif has_x and not has_z:
            var_u = 1.0 / (gxx * two_snr)
            var_w = np.full_like(snr, np.inf)
            cov = np.zeros_like(snr)
        elif has_z and not has_x:
            var_u = np.full_like(snr, np.inf)
            var_w = 1.0 / (gzz * two_snr)
            cov = np.zeros_like(snr)
        else:  # single element, or collinear along a slanted line: (u, w) not identifiable
            var_u = np.full_like(snr, np.inf)
            var_w = np.full_like(snr, np.inf)
            cov = np.zeros_like(snr)
    var_u = np.where(two_snr > 0, var_u, np.inf)
    var_w = np.where(two_snr > 0, var_w, np.inf)
    cov = np.where(two_snr > 0, cov, 0.0)
    return var_u, var_w, cov, has_x, has_z


def crb_direction_cosine(positions_m, wavelength_m, snr_per_channel):
    """(sigma_u, sigma_w), float32 arrays shaped like snr_per_channel.

    Cramer-Rao bound for one far-field source with unknown complex amplitude in white noise
    (deterministic model of Stoica and Nehorai, 1989). snr_per_channel is the linear power
    ratio |a|^2 / sigma^2 at one virtual channel (sigma^2 the total complex noise power); any
    shape, vectorised. For a lambda/2 ULA of M elements this equals Rife and Boorstyn's (1974)
    single-tone bound var(omega) = 6 / (SNR M (M^2 - 1)) with omega = pi * u. With both u and w
    unknown the 2x2 Fisher matrix of the centred (x, z) positions is inverted, so a coupling
    between x and z (non-separable layouts) is included. A direction the array has no extent in
    gets sigma = inf; snr <= 0 gives inf.
    """
    var_u, var_w, _, _, _ = _direction_cosine_covariance(positions_m, wavelength_m, snr_per_channel)
    return np.sqrt(var_u).astype(np.float32), np.sqrt(var_w).astype(np.float32)


def crb_unit_covariance(positions_m, wavelength_m) -> tuple[float, float, float, bool, bool]:
    """(var_u, var_w, cov_uw) of the CRB above at 2 SNR = 1, and whether the array has extent in x
    and in z: the covariance at any SNR is these divided by 2 SNR (inf where not identifiable)."""
    var_u, var_w, cov, has_x, has_z = _direction_cosine_covariance(positions_m, wavelength_m, 0.5)
    return float(var_u), float(var_w), float(cov), bool(has_x), bool(has_z)


@njit(cache=True, nogil=True, error_model="numpy")
def direction_sigmas_deg(var_u1, var_w1, cov_uw1, has_z, snr, az_rad, el_rad):
    """(sigma_azimuth_deg, sigma_elevation_deg) of one point: the direction-cosine CRB at 2 SNR = 1
    (var_u1, var_w1, cov_uw1 from crb_unit_covariance) divided by 2 snr, through the Jacobians
    d az/du = 1/v, d az/dw = u w / (v cos^2 el) and d el/dw = 1 / cos el. For an array without
    elevation extent (has_z false) w is not estimated and the elevation is taken as known, so only
    the u term remains. IEEE arithmetic, as numpy: a direction at the edge of visible space gives
    inf or nan, never an exception; snr <= 0 gives inf."""
    if snr > 0:
        two_snr = 2.0 * snr
        var_u, var_w, cov = var_u1 / two_snr, var_w1 / two_snr, cov_uw1 / two_snr
    else:
        var_u, var_w, cov = np.inf, np.inf, 0.0
    u = np.sin(az_rad) * np.cos(el_rad)
    w = np.sin(el_rad)
    cos_el = np.cos(el_rad)
    v = np.sqrt(max(0.0, 1.0 - u * u - w * w))
    ju = 1.0 / v
    var = ju * ju * var_u
    if has_z:
        jw = u * w / (v * (cos_el * cos_el))
        if jw != 0.0:
            var = var + 2.0 * ju * jw * cov + jw * jw * var_w
    return np.degrees(np.sqrt(var)), np.degrees(np.sqrt(var_w) / cos_el)


@njit(cache=True, nogil=True)
def _direction_sigmas_many(var_u1, var_w1, cov_uw1, has_z, snr, az_rad, el_rad, out_az, out_el):
    for k in range(snr.size):
        out_az[k], out_el[k] = direction_sigmas_deg(var_u1, var_w1, cov_uw1, has_z, snr[k], az_rad[k],
                                                    el_rad[k])


def _direction_sigmas(positions_m, wavelength_m, snr_per_channel, azimuth_deg, elevation_deg):
    var_u1, var_w1, cov1, _, has_z = crb_unit_covariance(positions_m, wavelength_m)
    snr, az, el = np.broadcast_arrays(np.asarray(snr_per_channel, np.float64),
                                      np.radians(np.asarray(azimuth_deg, np.float64)),
                                      np.radians(np.asarray(elevation_deg, np.float64)))
    out_az, out_el = np.empty(snr.shape), np.empty(snr.shape)
    _direction_sigmas_many(var_u1, var_w1, cov1, has_z, np.ascontiguousarray(snr).reshape(-1),
                           np.ascontiguousarray(az).reshape(-1), np.ascontiguousarray(el).reshape(-1),
                           out_az.reshape(-1), out_el.reshape(-1))
    return out_az.astype(np.float32), out_el.astype(np.float32)


def sigma_azimuth_deg(positions_m, wavelength_m, snr_per_channel, azimuth_deg, elevation_deg=0.0):
    """CRB standard deviation of azimuth in degrees (float32, broadcast over the inputs).

    Jacobian of az = atan2(u, v), v = sqrt(1 - u^2 - w^2): d az/du = 1/v,
    d az/dw = u w / (v cos^2 el). For an array without elevation extent w is not estimated and
    the elevation is taken as known (the value given), so only the u term remains.
    """
    return _direction_sigmas(positions_m, wavelength_m, snr_per_channel, azimuth_deg, elevation_deg)[0][()]


def sigma_elevation_deg(positions_m, wavelength_m, snr_per_channel, azimuth_deg=0.0, elevation_deg=0.0):
    """CRB standard deviation of elevation in degrees (float32, broadcast): el = asin(w), so
    sigma_el = sigma_w / cos(el); inf for an array without elevation extent.
    (azimuth_deg is accepted for symmetry with sigma_azimuth_deg; the bound does not depend on it.)"""
    return _direction_sigmas(positions_m, wavelength_m, snr_per_channel, azimuth_deg, elevation_deg)[1][()]


# --------------------------------------------------------------------------------------------
# several sources in one snapshot (Stoica and Nehorai 1989, deterministic model)
# --------------------------------------------------------------------------------------------


@njit(cache=True)
def source_bounds(snapshots, cal, kx, kz, det, u, w, do_u, do_w, unit, out_share, out_unit):
    """Per reported source: its share of the snapshot's signal energy and its direction-cosine CRB
    covariance (var_u, var_w, cov_uw) at 2 |a_k|^2 / sigma^2 = 1.

    Sources of one snapshot are consecutive rows (det grouped); snapshot d is calibrated by cal;
    steering a_k,i = exp(-j (kx_i u_k + kz_i w_k)) on the centred positions times 2 pi / lambda.
    One source: share 1 and `unit` (crb_unit_covariance). P >= 2 sources: the amplitudes s are the
    joint least-squares fit; with D the derivative columns (d a_k / d u_k, d a_k / d w_k for the
    measured angles) and P_perp the projection off the steering matrix A, the deterministic CRB of one
    snapshot is CRB = sigma^2 / 2 [Re((D^H P_perp D) o (s s^H)^T)]^-1 (Stoica and Nehorai, "MUSIC,
    maximum likelihood, and Cramer-Rao bound", IEEE Trans. ASSP, 1989), whose block of source k times
    2 |s_k|^2 / sigma^2 is written out (for a lone source it is `unit`). share_k = n_virt |s_k|^2 /
    ||A s||^2, so that |s_k|^2 / sigma^2 = share_k x the snapshot's SNR per element ||A s||^2 /
    (n_virt sigma^2). An angle the array does not measure gets var inf; a singular Fisher matrix
    (directions the array cannot separate) inf as well."""
    n_virt = snapshots.shape[1]
    n = det.size
    per = (1 if do_u else 0) + (1 if do_w else 0)
    k0 = 0
    while k0 < n:
        k1 = k0 + 1
        while k1 < n and det[k1] == det[k0]:
            k1 += 1
        p = k1 - k0
        if p == 1 or per == 0:
            for k in range(k0, k1):
                out_share[k] = 1.0
                out_unit[k, 0], out_unit[k, 1], out_unit[k, 2] = unit[0], unit[1], unit[2]
            k0 = k1
            continue
        d = det[k0]
        y = np.empty(n_virt, np.complex128)
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * cal[i]
        a = np.empty((n_virt, p), np.complex128)
        m = p * per
        dm = np.empty((n_virt, m), np.complex128)
        for k in range(p):
            for i in range(n_virt):
                a[i, k] = np.exp(-1j * (kx[i] * u[k0 + k] + kz[i] * w[k0 + k]))
            c = k * per
            if do_u:
                for i in range(n_virt):
                    dm[i, c] = -1j * kx[i] * a[i, k]
                c += 1
            if do_w:
                for i in range(n_virt):
                    dm[i, c] = -1j * kz[i] * a[i, k]
        ah = a.conj().T
        gram = ah @ a
        s = np.linalg.solve(gram, ah @ y)
        fit = a @ s
        fit_energy = 0.0
        for i in range(n_virt):
            fit_energy += fit[i].real ** 2 + fit[i].imag ** 2
        proj_d = dm - a @ np.linalg.solve(gram, ah @ dm)
        h = dm.conj().T @ proj_d
        fis = np.empty((m, m))
        for i in range(m):
            for j in range(m):
                fis[i, j] = (h[i, j] * s[j // per] * s[i // per].conjugate()).real
        ok = np.linalg.cond(fis) < 1e12
        cov = np.linalg.inv(fis) if ok else np.zeros((m, m))
        for k in range(p):
            amp2 = s[k].real ** 2 + s[k].imag ** 2
            out_share[k0 + k] = n_virt * amp2 / fit_energy if fit_energy > 0.0 else 0.0
            c = k * per
            vu, vw, cuw = np.inf, np.inf, 0.0
            if ok and do_u and do_w:
                vu, vw, cuw = amp2 * cov[c, c], amp2 * cov[c + 1, c + 1], amp2 * cov[c, c + 1]
            elif ok and do_u:
                vu = amp2 * cov[c, c]
            elif ok:
                vw = amp2 * cov[c, c]
            out_unit[k0 + k, 0], out_unit[k0 + k, 1], out_unit[k0 + k, 2] = vu, vw, cuw
        k0 = k1
