"""Range FFT over fast time, with the loading of each receive channel's samples.

The front end works one receive channel at a time, so that its block (all chirps of one RX, a few
hundred kB) stays in the core's cache from loading to the detection map. Loading reads the frame
(canonical complex64, or the board's int16 I/Q converted on the fly with its I/Q conventions),
applies both windows (range over samples, Doppler over loops; separable, so they multiply), removes
static returns on request, and writes the block already transposed to [slot, sample, loop]: the
Doppler FFT then runs over contiguous memory, and the range FFT runs along the sample axis.

Removing static returns subtracts each sample's mean over the loops of its slot before the FFTs; by
linearity this equals subtracting the mean over chirps of every range bin and channel.
"""

from __future__ import annotations

import numba
import numpy as np

from ..errors import CubecastError
from ..sensor import SPEED_OF_LIGHT_MPS, Sensor
from ..settings import ProcessingSettings
from .fft import fft_inplace
from .windows import make_window


@numba.njit(cache=True, nogil=True)
def _load(re, im, sign, rx, n_slots, w_range, w_doppler, remove_static, mean, block):
    """block[s, k, p] = w_range[k] w_doppler[p] (x[p * n_slots + s, rx, k] - mean_p x[., rx, k]) with
    x = re + j sign im; zero in the padding (k >= samples or p >= loops). `re` and `im` are
    [chirp, rx, sample] views: the parts of a complex64 frame, or the I and Q planes of int16 I/Q."""
    n_samples = w_range.shape[0]
    n_loops = w_doppler.shape[0]
    _, n_k, n_p = block.shape
    for s in range(n_slots):
        if remove_static:
            for k in range(n_samples):
                mean[k] = 0
            for p in range(n_loops):
                m = p * n_slots + s
                for k in range(n_samples):
                    mean[k] += complex(np.float32(re[m, rx, k]), sign * np.float32(im[m, rx, k]))
            for k in range(n_samples):
                mean[k] /= n_loops
        for p in range(n_loops):
            m = p * n_slots + s
            wd = w_doppler[p]
            for k in range(n_samples):
                v = complex(np.float32(re[m, rx, k]), sign * np.float32(im[m, rx, k]))
                if remove_static:
                    v = v - mean[k]
                block[s, k, p] = v * (w_range[k] * wd)
        for k in range(n_samples):
            for p in range(n_loops, n_p):
                block[s, k, p] = 0
        for k in range(n_samples, n_k):
            for p in range(n_p):
                block[s, k, p] = 0


class RangeFft:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings):
        n = sensor.samples_per_chirp
        self.fft_size = settings.range_fft_size or n
        if self.fft_size < n:
            raise CubecastError(f"[processing] range_fft_size = {self.fft_size}: must be at least the "
                                f"{n} samples per chirp")
        self.n_samples = n
        self.n_slots = sensor.n_slots
        self.window = make_window(settings.range_window, n, settings.range_kaiser_beta)
        self.n_bins = self.fft_size if sensor.adc.is_complex else self.fft_size // 2
        # metres per range bin: beat frequency bin * fs / Nfft, range = f_b c / (2 S)
        self.bin_m = sensor.sample_rate_hz / self.fft_size * SPEED_OF_LIGHT_MPS / (2.0 * sensor.slope_hz_per_s)
        self.adc = sensor.adc
        self.raw_iq16 = sensor.adc.is_complex and sensor.adc.sample_type == "int16"
        self.remove_static = settings.remove_static
        self._mean = np.zeros(n, np.complex64)

    def load(self, frame: np.ndarray, rx: int, doppler_window: np.ndarray, block: np.ndarray) -> None:
        """Windowed, transposed samples of receive channel `rx` of a canonical frame into `block`
        [slot, range_fft_size, doppler_fft_size]."""
        _load(frame.real, frame.imag, np.float32(1.0), rx, self.n_slots, self.window, doppler_window,
              self.remove_static, self._mean, block)

    def load_raw(self, raw: np.ndarray, rx: int, doppler_window: np.ndarray, block: np.ndarray) -> None:
        """The same straight from int16 I/Q [chirp, rx, sample, 2], with the board's I/Q conventions."""
        i_plane, q_plane = (raw[..., 1], raw[..., 0]) if self.adc.swap_iq else (raw[..., 0], raw[..., 1])
        sign = np.float32(-1.0 if self.adc.conjugate else 1.0)
        _load(i_plane, q_plane, sign, rx, self.n_slots, self.window, doppler_window, self.remove_static,
              self._mean, block)

    def transform(self, block: np.ndarray) -> None:
        """Range FFT along the sample axis of [slot, sample, doppler], in place."""
        fft_inplace(block, axis=1)
