"""Window functions for the range and Doppler FFTs (Harris, "On the use of windows for harmonic
analysis with the discrete Fourier transform", Proc. IEEE, 1978). Symmetric forms, float32.

Hann and Blackman are sampled without their zero end points: the N-sample window is the middle of
the (N + 2)-sample symmetric one. A window that is zero at a sample destroys that sample before the
FFT, and the end samples are the ones that carry the most information about a tone's frequency (a
symmetric Hann of 32 loops would cost 18 % of the Doppler estimate's Fisher information); with no
zero, the refinement (refine.py) can undo the window and estimate on the samples themselves.
"""

from __future__ import annotations

import numpy as np

from ..settings import WINDOW_NAMES  # noqa: F401  (what make_window knows; the settings validate against it)


def make_window(name: str, length: int, kaiser_beta: float = 6.0) -> np.ndarray:
    if name == "rect":
        w = np.ones(length)
    elif name == "hann":
        w = np.hanning(length + 2)[1:-1]
    elif name == "hamming":
        w = np.hamming(length)
    elif name == "blackman":
        w = np.blackman(length + 2)[1:-1]
    elif name == "kaiser":
        w = np.kaiser(length, kaiser_beta)
    else:  # settings validation names the field before we get here
        raise ValueError(f"unknown window {name!r}")
    return w.astype(np.float32)
