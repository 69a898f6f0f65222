"""The point record and the per-point accuracy figures.

Every point carries standard deviations from its SNR by the Cramér-Rao bound so that a tracker can
weight it. For a tone of N samples with per-sample SNR s in white noise the bound on its frequency
in bins is var(k) = 6 N^2 / ((2 pi)^2 s N (N^2 - 1)) (Rife and Boorstyn, "Single-tone parameter
estimation from discrete-time observations", IEEE Trans. IT, 1974). Range uses the N fast-time
samples, velocity the loops; both integrate over the K virtual channels, so with snr the per-channel
SNR in the range-Doppler cell (which already holds the coherent gain of the other dimension),
var(bin) = 6 / ((2 pi)^2 K snr (1 - 1/N^2)) in resolution cells. The windows widen the true spread;
the bound is the floor a tracker can count on, and it is what we report.
"""

from __future__ import annotations

import numba
import numpy as np

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


def tone_crb_bins(snr_per_channel: np.ndarray, n_channels: int, n_samples: int) -> np.ndarray:
    """Cramér-Rao standard deviation of a tone's frequency in bins of the unpadded DFT
    (Rife and Boorstyn 1974), with K channels of equal SNR integrated."""
    snr = np.maximum(np.asarray(snr_per_channel, np.float64), 1e-12)
    n = float(n_samples)
    return np.sqrt(6.0 / ((2.0 * np.pi) ** 2 * n_channels * snr * (1.0 - 1.0 / (n * n))))


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
    the cell's SNR its beam power holds. Standard deviations: the tone bound (tone_crb_bins) for
    range and velocity; for azimuth and elevation the direction-cosine CRB (var_u1, var_w1, cov_uw1 at
    2 SNR = 1, from angle.crb_unit_covariance) through the Jacobians of az = atan2(u, v) and
    el = asin(w), v = sqrt(1 - u^2 - w^2) (the same as angle.sigma_azimuth_deg and
    sigma_elevation_deg). `first` is scratch of at least the number of detections."""
    n = det_index.shape[0]
    for i in range(first.shape[0]):
        first[i] = 0.0
    for k in range(n):
        i = det_index[k]
        if peak_power[k] > first[i]:
            first[i] = peak_power[k]
    two_pi2 = (2.0 * np.pi) ** 2
    range_shape = 1.0 - 1.0 / (float(n_samples) * float(n_samples))
    loop_shape = 1.0 - 1.0 / (float(n_loops) * float(n_loops))
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
        out[k, 8] = np.sqrt(6.0 / (two_pi2 * n_virtual * s * range_shape)) * range_resolution_m
        out[k, 11] = np.sqrt(6.0 / (two_pi2 * n_virtual * s * loop_shape)) * velocity_resolution_mps
        # direction cosines (IEEE arithmetic, as numpy: a direction at the edge of visible space
        # gives inf or nan, never an exception)
        if snr_pt > 0:
            two_snr = 2.0 * snr_pt
            var_u, var_w, cov = var_u1 / two_snr, var_w1 / two_snr, cov_uw1 / two_snr
        else:
            var_u, var_w, cov = np.inf, np.inf, 0.0
        u = np.sin(az) * np.cos(el)
        w = np.sin(el)
        cos_el = np.cos(el)
        v = np.sqrt(max(0.0, 1.0 - u * u - w * w))
        ju = 1.0 / v
        var = ju * ju * var_u
        if has_z:
            jw = u * w / (v * (cos_el * cos_el))
            if jw != 0.0:
                var = var + 2.0 * ju * jw * cov + jw * jw * var_w
        out[k, 9] = np.degrees(np.sqrt(var))
        out[k, 10] = np.degrees(np.sqrt(var_w) / cos_el)
