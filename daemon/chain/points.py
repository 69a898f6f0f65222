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
