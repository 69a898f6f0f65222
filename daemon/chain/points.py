"""The point record and the per-point accuracy figures.

Every point carries standard deviations from its SNR by the Cramér-Rao bounds of bounds.py so that
a tracker can weight it. Range and velocity: the single-tone bound (Rife and Boorstyn, IEEE Trans.
IT, 1974), range over the N fast-time samples, velocity over the loops, both integrated over the K
virtual channels; with snr the per-channel SNR in the range-Doppler cell (which already holds the
coherent gain of the other dimension), var(bin) = 6 / ((2 pi)^2 K snr (1 - 1/N^2)) in resolution
cells. Azimuth and elevation: the direction-cosine bound of one source (Stoica and Nehorai, IEEE
Trans. ASSP, 1989). The windows widen the true spread; the bound is the floor a tracker can count
on, and it is what we report.
"""

from __future__ import annotations

import numba
import numpy as np

from .bounds import direction_sigmas_deg, tone_sigma_bins

POINT_FIELDS: tuple[tuple[str, str], ...] = (
    ("x_m", "m"), ("y_m", "m"), ("z_m", "m"),
    ("range_m", "m"), ("azimuth_deg", "deg"), ("elevation_deg", "deg"), ("velocity_mps", "m/s"),
    ("snr_db", "dB"),
    ("sigma_range_m", "m"), ("sigma_azimuth_deg", "deg"), ("sigma_elevation_deg", "deg"),
    ("sigma_velocity_mps", "m/s"),
)
POINT_DTYPE = np.dtype([(name, "<f4") for name, _ in POINT_FIELDS])

# offline CSV and wire: these two lead, then the point fields
FRAME_FIELDS: tuple[tuple[str, str, str], ...] = (("frame", "", "<u8"), ("timestamp_s", "s", "<f8"))
RECORD_DTYPE = np.dtype([(n, d) for n, _, d in FRAME_FIELDS] + [(name, "<f4") for name, _ in POINT_FIELDS])


def to_records(points: np.ndarray, frame: int, timestamp_s: float) -> np.ndarray:
    """Prefix the frame number and time: POINT_DTYPE rows -> RECORD_DTYPE rows."""
    out = np.empty(points.shape[0], RECORD_DTYPE)
    out["frame"] = frame
    out["timestamp_s"] = timestamp_s
    for name, _ in POINT_FIELDS:
        out[name] = points[name]
    return out


@numba.njit(cache=True, nogil=True, error_model="numpy")
def fill_points(range_bin, range_frac, bin_m, range_bias_m, det_index, azimuth_deg, elevation_deg, peak_power,
                doppler_hz, half_wavelength_m, snr, n_virtual, n_samples, n_loops, range_resolution_m,
                velocity_resolution_mps, var_u1, var_w1, cov_uw1, has_x, has_z, first, out):
    """The point records of one frame as float32 [n_points, 12] in POINT_FIELDS order.

    Point k is angle peak k of detection i = det_index[k]. A secondary angle peak gets the share of
    the cell's SNR its beam power holds. Standard deviations (bounds.py): the tone bound
    (tone_sigma_bins) for range and velocity; for azimuth and elevation the direction-cosine CRB
    (var_u1, var_w1, cov_uw1 at 2 SNR = 1, from bounds.crb_unit_covariance) through the Jacobians
    of az = atan2(u, v) and el = asin(w) (direction_sigmas_deg). `first` is scratch of at least the
    number of detections. has_x is not used (the bound is inf along an axis without extent)."""
    n = det_index.shape[0]
    for i in range(first.shape[0]):
        first[i] = 0.0
    for k in range(n):
        i = det_index[k]
        if peak_power[k] > first[i]:
            first[i] = peak_power[k]
    for k in range(n):
        i = det_index[k]
        snr_pt = np.float64(snr[i]) * (np.float64(peak_power[k]) / max(first[i], 1e-30))
        rng = np.float32((range_bin[i] + np.float64(range_frac[i])) * bin_m - range_bias_m)
        az = np.radians(np.float64(azimuth_deg[k]))
        el = np.radians(np.float64(elevation_deg[k]))
        r64 = np.float64(rng)
        out[k, 0] = r64 * np.cos(el) * np.sin(az)
        out[k, 1] = r64 * np.cos(el) * np.cos(az)
        out[k, 2] = r64 * np.sin(el)
        out[k, 3] = rng
        out[k, 4] = azimuth_deg[k]
        out[k, 5] = elevation_deg[k]
        out[k, 6] = doppler_hz[i] * half_wavelength_m
        s = max(snr_pt, 1e-12)
        out[k, 7] = 10.0 * np.log10(s)
        out[k, 8] = tone_sigma_bins(s, n_virtual, n_samples) * range_resolution_m
        out[k, 11] = tone_sigma_bins(s, n_virtual, n_loops) * velocity_resolution_mps
        out[k, 9], out[k, 10] = direction_sigmas_deg(var_u1, var_w1, cov_uw1, has_z, snr_pt, az, el)
