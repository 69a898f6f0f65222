"""Range FFT over fast time: window, zero padding, FFT; real-sampled data keep the lower half.

Input: the canonical frame, complex64 [chirp, rx, sample]. Output: complex64 [chirp, rx, range_bin]
in a buffer the stage owns and reuses every frame.
"""

from __future__ import annotations

import numpy as np

from ..sensor import SPEED_OF_LIGHT_MPS, Sensor
from ..settings import ProcessingSettings
from .fft import fft_inplace
from .windows import make_window


class RangeFft:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings):
        n = sensor.samples_per_chirp
        self.fft_size = settings.range_fft_size or n
        if self.fft_size < n:
            from ..errors import CubecastError
            raise CubecastError(f"[processing] range_fft_size = {self.fft_size}: must be at least the "
                                f"{n} samples per chirp")
        self.window = make_window(settings.range_window, n, settings.range_kaiser_beta)
        self.n_bins = self.fft_size if sensor.adc.is_complex else self.fft_size // 2
        # metres per range bin: beat frequency bin * fs / Nfft, range = f_b c / (2 S)
        self.bin_m = sensor.sample_rate_hz / self.fft_size * SPEED_OF_LIGHT_MPS / (2.0 * sensor.slope_hz_per_s)
        shape = (sensor.chirps_per_frame, sensor.n_rx)
        self._work = np.zeros(shape + (self.fft_size,), np.complex64)
        self.out = self._work[..., : self.n_bins]  # a view: no copy for complex sampling

    def __call__(self, frame: np.ndarray) -> np.ndarray:
        n = self.window.shape[0]
        np.multiply(frame, self.window, out=self._work[..., :n])
        if self.fft_size > n:
            self._work[..., n:] = 0  # the in-place FFT overwrote last frame's padding
        fft_inplace(self._work)
        return self.out
