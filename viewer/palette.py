"""The viewer's colours (the names and scales are ours): the panels' palette, the per-sensor hues of
the platform picture, and the colour scales of points (radial velocity, SNR) and of the map.

Radial velocity on a diverging "tide" scale, approaching (negative, range shrinking) in blue-greens,
receding (positive) in ambers, zero a neutral stone grey; SNR on a sequential "ember" scale; the
range-Doppler map on a "deep water" scale from ink to pale sand. Pure numpy, no vispy.
"""

from __future__ import annotations

import numpy as np

# ---- palette ------------------------------------------------------------------------------------
BACKGROUND = (0.067, 0.075, 0.090, 1.0)       # graphite
PANEL_BG = (0.035, 0.043, 0.055, 1.0)         # darker well for the plots
TEXT = (0.88, 0.90, 0.92, 1.0)
TEXT_DIM = (0.60, 0.64, 0.68, 1.0)
GRID = (0.42, 0.48, 0.54, 0.45)
GRID_LABEL = (0.66, 0.71, 0.76, 1.0)
FOV_EDGE = (0.80, 0.76, 0.52, 0.85)           # muted brass
FOV_FILL = (0.80, 0.76, 0.52, 0.05)
GROUND = (0.55, 0.42, 0.30, 1.0)              # earth
GROUND_FILL = (0.55, 0.42, 0.30, 0.16)
SENSOR_LINE = (0.62, 0.70, 0.78, 0.75)
SENSOR_MARK = (0.95, 0.95, 0.95, 1.0)
DETECTION_RING = (1.00, 0.32, 0.60, 1.0)      # rose: apart from every hue of the map scale
STATUS_OK = (0.62, 0.86, 0.62, 1.0)
STATUS_WAIT = (0.92, 0.80, 0.40, 1.0)
STATUS_STALL = (1.00, 0.45, 0.38, 1.0)
# one hue per sensor in the platform picture (ring of each point, its field of view, its mark, its
# name), in the order of the sorted sensor ids; chosen apart from the velocity scale's ends
SENSOR_COLORS = (
    (0.40, 0.86, 0.78),   # jade
    (0.98, 0.70, 0.36),   # apricot
    (0.78, 0.58, 0.98),   # lilac
    (0.92, 0.90, 0.42),   # citron
    (0.98, 0.50, 0.62),   # coral
    (0.56, 0.74, 1.00),   # cornflower
)
FRAMES = ("sensor", "platform")

# (position on the scale in [-1, 1], RGB): approaching blue-greens, stone at zero, receding ambers
VELOCITY_STOPS = (
    (-1.00, (0.10, 0.38, 0.95)),
    (-0.50, (0.12, 0.70, 0.95)),
    (-0.15, (0.45, 0.85, 0.90)),
    (0.00, (0.80, 0.79, 0.76)),
    (0.15, (0.98, 0.80, 0.45)),
    (0.50, (1.00, 0.58, 0.15)),
    (1.00, (0.92, 0.26, 0.12)),
)
# sequential, for SNR: dusk violet -> copper -> warm white
SNR_STOPS = (
    (0.00, (0.34, 0.28, 0.62)),
    (0.35, (0.70, 0.32, 0.52)),
    (0.65, (0.96, 0.55, 0.30)),
    (1.00, (1.00, 0.95, 0.76)),
)
# sequential, for the range-Doppler map: ink -> harbour blue -> sea green -> sand -> near white
MAP_STOPS = (
    (0.00, (0.03, 0.05, 0.09)),
    (0.22, (0.07, 0.19, 0.33)),
    (0.48, (0.10, 0.45, 0.50)),
    (0.74, (0.62, 0.72, 0.44)),
    (1.00, (0.99, 0.96, 0.84)),
)

DEFAULT_VELOCITY_SPAN_MPS = 2.5
DEFAULT_SNR_RANGE_DB = (10.0, 45.0)
DEFAULT_PERSIST_FRAMES = 8
DEFAULT_SENSOR_HEIGHT_M = 1.0
# point clouds kept by frame sequence for the range-Doppler rings: the map comes at most 5 times a
# second and the points of its own frame must still be here when it does (64 frames: 6 s at 10 fps)
RECENT_FRAMES = 64


def _ramp(stops, t: np.ndarray) -> np.ndarray:
    """Piecewise-linear RGB over `stops` at positions t (clipped to the stop range): float32 [N, 3]."""
    pos = np.array([s[0] for s in stops], np.float64)
    rgb = np.array([s[1] for s in stops], np.float64)
    t = np.clip(np.asarray(t, np.float64), pos[0], pos[-1])
    out = np.empty(t.shape + (3,), np.float32)
    for c in range(3):
        out[..., c] = np.interp(t, pos, rgb[:, c])
    return out


def velocity_colors(velocity_mps, span_mps: float = DEFAULT_VELOCITY_SPAN_MPS, alpha=1.0) -> np.ndarray:
    """RGBA float32 [N, 4] on the diverging scale: -span (approaching) .. 0 (neutral) .. +span."""
    v = np.asarray(velocity_mps, np.float64).reshape(-1)
    t = np.where(np.isfinite(v), v / max(span_mps, 1e-6), 0.0)
    out = np.empty((v.size, 4), np.float32)
    out[:, :3] = _ramp(VELOCITY_STOPS, t)
    out[:, 3] = alpha
    return out


def snr_colors(snr_db, lo_db: float = DEFAULT_SNR_RANGE_DB[0], hi_db: float = DEFAULT_SNR_RANGE_DB[1],
               alpha=1.0) -> np.ndarray:
    s = np.asarray(snr_db, np.float64).reshape(-1)
    t = np.where(np.isfinite(s), (s - lo_db) / max(hi_db - lo_db, 1e-6), 0.0)
    out = np.empty((s.size, 4), np.float32)
    out[:, :3] = _ramp(SNR_STOPS, t)
    out[:, 3] = alpha
    return out


def snr_sizes(snr_db, lo_db: float = DEFAULT_SNR_RANGE_DB[0], hi_db: float = DEFAULT_SNR_RANGE_DB[1],
              min_px: float = 6.0, max_px: float = 17.0) -> np.ndarray:
    """Marker diameter in pixels, growing linearly with SNR between lo_db and hi_db."""
    s = np.asarray(snr_db, np.float64).reshape(-1)
    t = np.clip(np.where(np.isfinite(s), (s - lo_db) / max(hi_db - lo_db, 1e-6), 0.0), 0.0, 1.0)
    return (min_px + t * (max_px - min_px)).astype(np.float32)


def map_colors(values_db, lo_db: float, hi_db: float) -> np.ndarray:
    """RGBA uint8 [..., 4] of a dB array on the map scale (non-finite values draw as the floor)."""
    v = np.asarray(values_db, np.float64)
    t = np.where(np.isfinite(v), (v - lo_db) / max(hi_db - lo_db, 1e-6), 0.0)
    rgb = _ramp(MAP_STOPS, t)
    out = np.empty(v.shape + (4,), np.uint8)
    out[..., :3] = np.round(rgb * 255.0)
    out[..., 3] = 255
    return out
