"""Range FFT over fast time: window, zero padding, FFT; real-sampled data keep the lower half.

The front end works one receive channel at a time so that each block (all chirps of one RX, a few
hundred kB) stays in the core's cache from loading through the range FFT to the Doppler regrouping.
`load` fills the block from a canonical frame or straight from the board's int16 I/Q (converting,
applying the I/Q conventions and the window in one pass); `transform` runs the FFT in place.
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
def _load_canonical(frame, rx, window, work):
    n_chirps, _, n = frame.shape
    for m in range(n_chirps):
        for k in range(n):
            work[m, k] = frame[m, rx, k] * window[k]


@numba.njit(cache=True, nogil=True)
def _load_iq16(raw, rx, window, swap_iq, conjugate, work):
    """raw int16 [chirp, rx, sample, 2] -> windowed complex64, with the board's I/Q conventions."""
    n_chirps, _, n, _ = raw.shape
    qi = 0 if swap_iq else 1
    ii = 1 - qi
    sign = np.float32(-1.0) if conjugate else np.float32(1.0)
    for m in range(n_chirps):
        for k in range(n):
            w = window[k]
            work[m, k] = complex(np.float32(raw[m, rx, k, ii]) * w, sign * np.float32(raw[m, rx, k, qi]) * w)


class RangeFft:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings):
        n = sensor.samples_per_chirp
        self.fft_size = settings.range_fft_size or n
        if self.fft_size < n:
            raise CubecastError(f"[processing] range_fft_size = {self.fft_size}: must be at least the "
                                f"{n} samples per chirp")
        self.n_samples = n
        self.window = make_window(settings.range_window, n, settings.range_kaiser_beta)
        self.n_bins = self.fft_size if sensor.adc.is_complex else self.fft_size // 2
        # metres per range bin: beat frequency bin * fs / Nfft, range = f_b c / (2 S)
        self.bin_m = sensor.sample_rate_hz / self.fft_size * SPEED_OF_LIGHT_MPS / (2.0 * sensor.slope_hz_per_s)
        self.adc = sensor.adc
        self.raw_iq16 = sensor.adc.is_complex and sensor.adc.sample_type == "int16"
        self.work = np.zeros((sensor.chirps_per_frame, self.fft_size), np.complex64)
        self.out = self.work[:, : self.n_bins]  # range bins of the current RX block (a view)

    def load(self, frame: np.ndarray, rx: int) -> None:
        """Windowed samples of receive channel `rx` from a canonical frame."""
        _load_canonical(frame, rx, self.window, self.work)

    def load_raw(self, raw: np.ndarray, rx: int) -> None:
        """Windowed samples of receive channel `rx` straight from int16 I/Q [chirp, rx, sample, 2]."""
        _load_iq16(raw, rx, self.window, self.adc.swap_iq, self.adc.conjugate, self.work)

    def transform(self) -> np.ndarray:
        if self.fft_size > self.n_samples:
            self.work[:, self.n_samples:] = 0  # the in-place FFT overwrote last block's padding
        fft_inplace(self.work)
        return self.out
