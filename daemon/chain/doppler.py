"""Doppler FFT over slow time and the range-Doppler detection map.

The range FFT output [chirp, rx, range] is regrouped by MIMO slot into channels
[slot * n_rx + rx, range, loop] so that the Doppler FFT runs over contiguous memory, windowed (and,
on request, with the static clutter removed: the mean over loops of each range bin and channel is
subtracted). Demultiplexing into the virtual array happens per detection afterwards (mimo.py):
the FFTs and the decoding are linear and commute, and decoding after the Doppler FFT lets the
Doppler-induced phase between slots be compensated first.

The detection map is the non-coherent sum of |X|^2 over channels, float32 [range, doppler] with the
Doppler axis shifted so that column j is Doppler bin j - n_doppler // 2.
"""

from __future__ import annotations

import numba
import numpy as np

from ..sensor import Sensor
from ..settings import ProcessingSettings
from .fft import fft_inplace
from .windows import make_window


@numba.njit(cache=True, nogil=True)
def _regroup(rfft, n_slots, window, remove_static, out):
    """out[s * n_rx + l, r, p] = window[p] * (rfft[p * n_slots + s, l, r] - mean_p(...))."""
    n_chirps, n_rx, n_range = rfft.shape
    n_loops = n_chirps // n_slots
    for s in range(n_slots):
        for l in range(n_rx):
            ch = s * n_rx + l
            for r in range(n_range):
                mean = np.complex64(0)
                if remove_static:
                    acc = 0j
                    for p in range(n_loops):
                        acc += rfft[p * n_slots + s, l, r]
                    mean = np.complex64(acc / n_loops)
                for p in range(n_loops):
                    out[ch, r, p] = (rfft[p * n_slots + s, l, r] - mean) * window[p]


@numba.njit(cache=True, nogil=True)
def _power_map(spec, out):
    """out[r, (d + nd // 2) % nd] = sum over channels of |spec[ch, r, d]|^2."""
    n_ch, n_range, nd = spec.shape
    half = nd // 2
    for r in range(n_range):
        for d in range(nd):
            acc = np.float32(0.0)
            for ch in range(n_ch):
                v = spec[ch, r, d]
                acc += v.real * v.real + v.imag * v.imag
            out[r, (d + half) % nd] = acc


class DopplerFft:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings, n_range_bins: int):
        self.n_loops = sensor.n_loops
        self.fft_size = settings.doppler_fft_size or self.n_loops
        if self.fft_size < self.n_loops:
            from ..errors import CubecastError
            raise CubecastError(f"[processing] doppler_fft_size = {self.fft_size}: must be at least the "
                                f"{self.n_loops} loops per frame")
        self.n_slots = sensor.n_slots
        self.n_channels = sensor.n_slots * sensor.n_rx
        self.window = make_window(settings.doppler_window, self.n_loops, settings.doppler_kaiser_beta)
        self.remove_static = settings.static_clutter_removal
        self.spectrum = np.zeros((self.n_channels, n_range_bins, self.fft_size), np.complex64)
        self.power = np.zeros((n_range_bins, self.fft_size), np.float32)
        # Doppler frequency of one bin: 1 / (N_fft * T_loop)
        self.bin_hz = 1.0 / (self.fft_size * sensor.loop_period_s)

    def __call__(self, rfft: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        _regroup(rfft, self.n_slots, self.window, self.remove_static, self.spectrum)
        if self.fft_size > self.n_loops:
            self.spectrum[..., self.n_loops:] = 0
        fft_inplace(self.spectrum)
        _power_map(self.spectrum, self.power)
        return self.spectrum, self.power
