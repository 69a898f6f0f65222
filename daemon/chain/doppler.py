"""Doppler FFT over slow time and the range-Doppler detection map.

The range FFT of one receive channel ([chirp, range], chirps in transmission order) is regrouped by
MIMO slot into the spectrum [rx, slot, range, loop] so that the Doppler FFT runs over contiguous
memory, windowed (and, on request, with the static clutter removed: the mean over loops of each range
bin and channel is subtracted). Demultiplexing into the virtual array happens per detection
afterwards (mimo.py): the FFTs and the decoding are linear and commute, and decoding after the
Doppler FFT lets the Doppler-induced phase between slots be compensated first.

The detection map is the non-coherent sum of |X|^2 over channels, float32 [range, doppler] with the
Doppler axis shifted so that column j is Doppler bin j - n_doppler // 2.
"""

from __future__ import annotations

import numba
import numpy as np

from ..errors import CubecastError
from ..sensor import Sensor
from ..settings import ProcessingSettings
from .fft import fft_inplace
from .windows import make_window


@numba.njit(cache=True, nogil=True)
def _regroup(block, n_slots, window, remove_static, mean, out):
    """out[s, r, p] = window[p] * (block[p * n_slots + s, r] - mean_p(...)), out = one RX's slots.

    A blocked transpose: tiles of 16 loops x 16 range bins keep the reads (contiguous in r) and the
    writes (contiguous in p) in cache."""
    n_range = out.shape[1]
    n_loops = block.shape[0] // n_slots
    tile = 16
    for s in range(n_slots):
        if remove_static:
            for r in range(n_range):
                mean[r] = 0
            for p in range(n_loops):
                for r in range(n_range):
                    mean[r] += block[p * n_slots + s, r]
            for r in range(n_range):
                mean[r] /= n_loops
        for p0 in range(0, n_loops, tile):
            p1 = min(p0 + tile, n_loops)
            for r0 in range(0, n_range, tile):
                r1 = min(r0 + tile, n_range)
                for p in range(p0, p1):
                    w = window[p]
                    src = p * n_slots + s
                    if remove_static:
                        for r in range(r0, r1):
                            out[s, r, p] = (block[src, r] - mean[r]) * w
                    else:
                        for r in range(r0, r1):
                            out[s, r, p] = block[src, r] * w


@numba.njit(cache=True, nogil=True)
def _accumulate_power(spec, out):
    """out[r, (d + nd // 2) % nd] += |spec[s, r, d]|^2 over the slots of one RX."""
    n_slots, n_range, nd = spec.shape
    half = nd // 2
    for s in range(n_slots):
        for r in range(n_range):
            for d in range(nd):
                v = spec[s, r, d]
                j = d + half
                if j >= nd:
                    j -= nd
                out[r, j] += v.real * v.real + v.imag * v.imag


class DopplerFft:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings, n_range_bins: int):
        self.n_loops = sensor.n_loops
        self.fft_size = settings.doppler_fft_size or self.n_loops
        if self.fft_size < self.n_loops:
            raise CubecastError(f"[processing] doppler_fft_size = {self.fft_size}: must be at least the "
                                f"{self.n_loops} loops per frame")
        self.n_slots = sensor.n_slots
        self.n_rx = sensor.n_rx
        self.n_channels = sensor.n_slots * sensor.n_rx
        self.window = make_window(settings.doppler_window, self.n_loops, settings.doppler_kaiser_beta)
        self.remove_static = settings.static_clutter_removal
        self.spectrum = np.zeros((self.n_rx, self.n_slots, n_range_bins, self.fft_size), np.complex64)
        self.power = np.zeros((n_range_bins, self.fft_size), np.float32)
        self._mean = np.zeros(n_range_bins, np.complex64)
        # Doppler frequency of one bin: 1 / (N_fft * T_loop)
        self.bin_hz = 1.0 / (self.fft_size * sensor.loop_period_s)

    def begin(self) -> None:
        self.power[...] = 0

    def add(self, range_block: np.ndarray, rx: int) -> None:
        """Regroup, transform and accumulate one RX channel's range FFT [chirp, range]."""
        spec = self.spectrum[rx]
        _regroup(range_block, self.n_slots, self.window, self.remove_static, self._mean, spec)
        if self.fft_size > self.n_loops:
            spec[..., self.n_loops:] = 0
        fft_inplace(spec)
        _accumulate_power(spec, self.power)
