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

import numpy as np

from ..errors import CubecastError
from ..sensor import SPEED_OF_LIGHT_MPS, Sensor
from ..settings import ProcessingSettings
from .fft import fft_into
from .frontend import FrontEnd
from .windows import make_window


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
        # staging block of one receive channel, [slot, loop, range_fft_size]; the padding stays zero
        self.stage = np.zeros((self.n_slots, self.n_loops, self.fft_size), np.complex64)
        self._stage_f = self.stage.view(np.float32)

    def source(self, data: np.ndarray, raw: bool) -> tuple[np.ndarray, np.ndarray, bool, float]:
        """What `load` reads for one frame: the interleaved I/Q view [chirp, rx, 2 * samples] of a
        canonical frame (raw=False) or of the board's int16 I/Q [chirp, rx, sample, 2] (raw=True),
        with its window, I/Q swap and the sign of its Q against the canonical Q."""
        if raw:
            return (np.ascontiguousarray(data).reshape(data.shape[0], data.shape[1], -1), self._w2_raw,
                    self.adc.swap_iq, -1.0 if self.adc.conjugate else 1.0)
        return np.ascontiguousarray(data).view(np.float32), self._w2, False, 1.0

    def load(self, source: tuple[np.ndarray, np.ndarray, bool, float], rx: int, doppler_window: np.ndarray,
             frontend: FrontEnd) -> None:
        """Windowed samples of receive channel `rx` into the staging block, through the front end
        (frontend.py: its monitors, DC or static mean removed, I/Q corrected, bursts repaired)."""
        src, w2, swap, qsign = source
        frontend.load(src, rx, self.n_slots, w2, doppler_window, swap, qsign, self._stage_f)

    def output_view(self, block: np.ndarray) -> np.ndarray:
        """The view of `block` [slot, range_fft_size, doppler_fft_size] the range FFT writes: its
        first n_loops Doppler columns, transposed to [slot, loop, range]."""
        return block[:, :, : self.n_loops].transpose(0, 2, 1)

    def transform(self, out: np.ndarray) -> None:
        """Range FFT of the staging block into `out` (an output_view)."""
        fft_into(self.stage, out, axis=2)
