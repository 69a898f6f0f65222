"""The point record and the per-point accuracy figures.

Every point carries the standard deviations a tracker can weight it by: the expected standard
deviation of this chain's estimate of that coordinate, not only a bound. Range and velocity: the
variance of the refined periodogram peak (refine.py; with the flat taper it is the single-tone
Cramér-Rao bound of Rife and Boorstyn, IEEE Trans. IT, 1974, at the SNR of the detection's own
samples), plus a floor for the residual systematic error. Azimuth and elevation: the
direction-cosine bound of the source given the others of its cell (Stoica and Nehorai, IEEE Trans.
ASSP, 1989; one source: the single-source bound) at its share of the SNR of the virtual snapshot
taken at the refined frequencies, which the angle stage reaches, with a floor
ANGLE_FLOOR_DEG in quadrature for the residual systematic error.
"""

from __future__ import annotations

import numba
import numpy as np

from .bounds import direction_sigmas_deg

ANGLE_FLOOR_DEG = 0.005   # residual systematic angle error, added in quadrature

POINT_FIELDS: tuple[tuple[str, str], ...] = (
    ("x_m", "m"), ("y_m", "m"), ("z_m", "m"),
    ("range_m", "m"), ("azimuth_deg", "deg"), ("elevation_deg", "deg"), ("velocity_mps", "m/s"),
    ("snr_db", "dB"),
    ("sigma_range_m", "m"), ("sigma_azimuth_deg", "deg"), ("sigma_elevation_deg", "deg"),
    ("sigma_velocity_mps", "m/s"),
    ("platform_x_m", "m"), ("platform_y_m", "m"), ("platform_z_m", "m"),
    ("cell_sources", ""),
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
def fill_points(range_bin, bin_m, range_bias_m, det_index, azimuth_deg, elevation_deg, snr_share, doppler_hz,
                half_wavelength_m, cell_snr, element_snr, sigma_range_m, sigma_velocity_mps, phase_centre_m,
                crb_unit, has_x, has_z, pose_rotation, pose_position_m, out):
    """The point records of one frame as float32 [n_points, 16] in POINT_FIELDS order.

    Point k is angle peak k of detection i = det_index[k]; range_bin[i] is its refined range in FFT
    bins. That range is the mean over the virtual channels of the two-way path / 2, i.e. the range
    from the array's phase centre c = mean(tx_k + rx_l) / 2 (phase_centre_m); the point's range from
    the sensor origin adds u . c in the point's direction u (far field, common practice). A source of
    a cell holding several gets its share of the cell's signal energy, snr_share[k] (AngleResult:
    n_virt |a_k|^2 / ||A a||^2, 1 for a lone source): snr_db is the per-channel SNR in the
    range-Doppler cell (cell_snr) times that, and the angle bound uses the SNR per virtual element of
    the snapshot (element_snr) times that. Range and velocity sigmas are the detection's
    (sigma_range_m, sigma_velocity_mps). Azimuth and elevation: the source's direction-cosine CRB
    given the other sources of its cell, crb_unit[k] = (var_u, var_w, cov_uw) at 2 SNR = 1
    (AngleResult.crb_unit, bounds.source_bounds; a lone source's is bounds.crb_unit_covariance),
    through the Jacobians of az = atan2(u, v) and el = asin(w) (direction_sigmas_deg), with
    ANGLE_FLOOR_DEG in quadrature. The platform-frame point is pose_rotation @ (x, y, z) +
    pose_position_m (sensor.Sensor's pose). has_x is not used (the bound is inf along an axis
    without extent). half_wavelength_m[i]: half the wavelength of detection i's echo over the sampled
    sweep (velocity = Doppler frequency x that). cell_sources: how many points detection i gave (the
    sources the angle stage found in the cell)."""
    n = det_index.shape[0]
    floor2 = ANGLE_FLOOR_DEG * ANGLE_FLOOR_DEG
    sources = np.zeros(range_bin.shape[0], np.int64)
    for k in range(n):
        sources[det_index[k]] += 1
    for k in range(n):
        i = det_index[k]
        share = np.float64(snr_share[k])
        az = np.radians(np.float64(azimuth_deg[k]))
        el = np.radians(np.float64(elevation_deg[k]))
        toward = (np.cos(el) * np.sin(az) * phase_centre_m[0] + np.cos(el) * np.cos(az) * phase_centre_m[1]
                  + np.sin(el) * phase_centre_m[2])
        rng = np.float32(np.float64(range_bin[i]) * bin_m - range_bias_m + toward)
        r64 = np.float64(rng)
        x, y, z = r64 * np.cos(el) * np.sin(az), r64 * np.cos(el) * np.cos(az), r64 * np.sin(el)
        out[k, 0] = x
        out[k, 1] = y
        out[k, 2] = z
        for j in range(3):
            out[k, 12 + j] = (pose_rotation[j, 0] * x + pose_rotation[j, 1] * y + pose_rotation[j, 2] * z
                              + pose_position_m[j])
        out[k, 3] = rng
        out[k, 4] = azimuth_deg[k]
        out[k, 5] = elevation_deg[k]
        out[k, 6] = doppler_hz[i] * half_wavelength_m[i]
        out[k, 7] = 10.0 * np.log10(max(np.float64(cell_snr[i]) * share, 1e-12))
        out[k, 8] = sigma_range_m[i]
        out[k, 11] = sigma_velocity_mps[i]
        s_az, s_el = direction_sigmas_deg(crb_unit[k, 0], crb_unit[k, 1], crb_unit[k, 2], has_z,
                                          np.float64(element_snr[i]) * share, az, el)
        out[k, 9] = np.sqrt(s_az * s_az + floor2)
        out[k, 10] = np.sqrt(s_el * s_el + floor2)
        out[k, 15] = sources[i]
