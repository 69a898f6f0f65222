"""Range FFT over fast time, with the loading of each receive channel's samples.

The front end works one receive channel at a time, so that its data (all chirps of one RX, under a
megabyte for the reference sensor) stays in the core's cache from loading to the detection map.

Loading reads the frame (canonical complex64, or the board's int16 I/Q converted on the fly with
its I/Q conventions) as interleaved I/Q numbers, applies both windows (range over samples, Doppler
over loops; separable, so they multiply), removes static returns on request, and writes a staging
block [slot, loop, sample] in the frame's own order: every read and write runs along contiguous
memory and the loop vectorises. The range FFT then reads the staging rows and writes its output
transposed, [slot, range, loop], so that the Doppler FFT that follows runs over contiguous memory.
The transposition happens inside the FFT's own output pass, a few transforms at a time, instead of
costing a separate strided pass over the cube.

Removing static returns subtracts each sample's mean over the loops of its slot before the FFTs; by
linearity this equals subtracting the mean over chirps of every range bin and channel.
"""

from __future__ import annotations

import numba
import numpy as np

from ..errors import CubecastError
from ..sensor import SPEED_OF_LIGHT_MPS, Sensor
from ..settings import ProcessingSettings
from .fft import fft_into
from .windows import make_window


@numba.njit(cache=True, nogil=True)
def _load(src, rx, n_slots, w2, w_doppler, swap, remove_static, mean, stage):
    """stage[s, p, 2k + c] = w2[2k + c] w_doppler[p] (x[p n_slots + s, rx, 2k + c'] - mean) where
    `src` is [chirp, rx, 2 * samples] interleaved I/Q (int16 or float32), c' = c or, with `swap`,
    1 - c, `w2` is the range window repeated for I and Q with the Q sign folded in, and the mean is
    over the loops of slot s when `remove_static`. Samples past the data (zero padding) are left as
    they are: zero since the buffer was made."""
    n2 = w2.shape[0]
    n_loops = w_doppler.shape[0]
    for s in range(n_slots):
        if remove_static:
            for k in range(n2):
                mean[k] = 0.0
            for p in range(n_loops):
                row = src[p * n_slots + s, rx]
                for k in range(n2):
                    mean[k] += row[k]
            for k in range(n2):
                mean[k] /= n_loops
        for p in range(n_loops):
            row = src[p * n_slots + s, rx]
            out = stage[s, p]
            wd = w_doppler[p]
            if swap:
                for k in range(0, n2, 2):
                    out[k] = np.float32(row[k + 1] - mean[k + 1]) * (w2[k] * wd)
                    out[k + 1] = np.float32(row[k] - mean[k]) * (w2[k + 1] * wd)
            elif remove_static:
                for k in range(n2):
                    out[k] = np.float32(row[k] - mean[k]) * (w2[k] * wd)
            else:
                for k in range(n2):
                    out[k] = np.float32(row[k]) * (w2[k] * wd)


class RangeFft:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings):
        n = sensor.samples_per_chirp
        self.fft_size = settings.range_fft_size or n
        if self.fft_size < n:
            raise CubecastError(f"[processing] range_fft_size = {self.fft_size}: must be at least the "
                                f"{n} samples per chirp")
        self.n_samples = n
        self.n_slots = sensor.n_slots
        self.n_loops = sensor.n_loops
        self.window = make_window(settings.range_window, n, settings.range_kaiser_beta)
        self.n_bins = self.fft_size if sensor.adc.is_complex else self.fft_size // 2
        # metres per range bin: beat frequency bin * fs / Nfft, range = f_b c / (2 S)
        self.bin_m = sensor.sample_rate_hz / self.fft_size * SPEED_OF_LIGHT_MPS / (2.0 * sensor.slope_hz_per_s)
        self.adc = sensor.adc
        self.raw_iq16 = sensor.adc.is_complex and sensor.adc.sample_type == "int16"
        self.remove_static = settings.remove_static
        # windows over interleaved I/Q: canonical frames as they are, the board's with its Q sign
        self._w2 = np.repeat(self.window, 2)
        self._w2_raw = self._w2.copy()
        if sensor.adc.conjugate:
            self._w2_raw[1::2] *= np.float32(-1.0)
        self._mean = np.zeros(2 * n, np.float64)
        # staging block of one receive channel, [slot, loop, range_fft_size]; the padding stays zero
        self.stage = np.zeros((self.n_slots, self.n_loops, self.fft_size), np.complex64)
        self._stage_f = self.stage.view(np.float32)

    def source(self, data: np.ndarray, raw: bool) -> tuple[np.ndarray, np.ndarray, bool]:
        """What `load` reads for one frame: the interleaved I/Q view [chirp, rx, 2 * samples] of a
        canonical frame (raw=False) or of the board's int16 I/Q [chirp, rx, sample, 2] (raw=True),
        with its window and I/Q swap."""
        if raw:
            return (np.ascontiguousarray(data).reshape(data.shape[0], data.shape[1], -1), self._w2_raw,
                    self.adc.swap_iq)
        return np.ascontiguousarray(data).view(np.float32), self._w2, False

    def load(self, source: tuple[np.ndarray, np.ndarray, bool], rx: int, doppler_window: np.ndarray) -> None:
        """Windowed samples of receive channel `rx` into the staging block."""
        src, w2, swap = source
        _load(src, rx, self.n_slots, w2, doppler_window, swap, self.remove_static, self._mean, self._stage_f)

    def output_view(self, block: np.ndarray) -> np.ndarray:
        """The view of `block` [slot, range_fft_size, doppler_fft_size] the range FFT writes: its
        first n_loops Doppler columns, transposed to [slot, loop, range]."""
        return block[:, :, : self.n_loops].transpose(0, 2, 1)

    def transform(self, out: np.ndarray) -> None:
        """Range FFT of the staging block into `out` (an output_view)."""
        fft_into(self.stage, out, axis=2)
