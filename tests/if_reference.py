"""The IF filter's reference response for tests: scipy.signal's analog Butterworth (reference library)."""

from __future__ import annotations

import numpy as np
import scipy.signal


def butterworth_db(order: int, cutoff_hz: float, f_hz) -> np.ndarray:
    """|H(f)| in dB of an analog Butterworth low-pass of this order and cutoff (Butterworth, "On the
    theory of filter amplifiers", 1930), from scipy.signal.butter(analog=True) and freqs_zpk."""
    z, p, k = scipy.signal.butter(order, 2 * np.pi * cutoff_hz, btype="low", analog=True, output="zpk")
    _, h = scipy.signal.freqs_zpk(z, p, k, worN=2 * np.pi * np.atleast_1d(np.asarray(f_hz, np.float64)))
    return 20 * np.log10(np.abs(h))
