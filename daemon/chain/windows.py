"""Window functions for the range and Doppler FFTs (Harris, "On the use of windows for harmonic
analysis with the discrete Fourier transform", Proc. IEEE, 1978). Symmetric forms, float32."""

from __future__ import annotations

import numpy as np

from ..settings import WINDOW_NAMES  # noqa: F401  (what make_window knows; the settings validate against it)


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
