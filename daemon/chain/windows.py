"""Window functions for the range and Doppler FFTs (Harris, "On the use of windows for harmonic
analysis with the discrete Fourier transform", Proc. IEEE, 1978). Symmetric forms, float32."""

from __future__ import annotations

import numpy as np


def make_window(name: str, length: int, kaiser_beta: float = 6.0) -> np.ndarray:
    if name == "rect":
        w = np.ones(length)
    elif name == "hann":
        w = np.hanning(length)
    elif name == "hamming":
        w = np.hamming(length)
    elif name == "blackman":
        w = np.blackman(length)
    elif name == "kaiser":
        w = np.kaiser(length, kaiser_beta)
    else:  # settings validation names the field before we get here
        raise ValueError(f"unknown window {name!r}")
    return w.astype(np.float32)


def noise_bandwidth_bins(w: np.ndarray) -> float:
    """Equivalent noise bandwidth in bins, N sum(w^2) / (sum w)^2 (Harris 1978)."""
    w = w.astype(np.float64)
    return float(len(w) * np.sum(w * w) / np.sum(w) ** 2)
