"""Doppler FFT over slow time and the range-Doppler detection map.

Each receive channel's block [slot, range, loop] (windowed and range-transformed by rangefft.py,
which writes it in this transposed layout) is transformed over the loops, where the memory is
contiguous; the blocks together make the spectrum [rx, slot, range, doppler]. With real sampling
only the lower half of the range bins is kept and transformed. Demultiplexing into the virtual
array happens per detection afterwards (mimo.py): the FFTs and the decoding are linear and
commute, and decoding after the Doppler FFT lets the Doppler-induced phase between slots be
compensated first.

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


_U = numba.uint64


@numba.njit(cache=True, nogil=True)
def _accumulate_power(flat, n_slots, rows_alloc, nd, n_bins, row_sum, out, cell_ptr, cell_s, cell_d, cell_power):
    """out[r, (d + nd // 2) % nd] += sum over the slots of one RX of |spec[s, r, d]|^2, r < n_bins, with
    flat the float32 view of the RX's block [slot, rows_alloc, nd] (interleaved I/Q) and out flat
    [n_bins * nd]. The slots are summed into row_sum first (contiguous, vectorised), then added with the
    shift split into two branch-free runs. On the way, while row r is in the cache, the sampled cells
    q in cell_ptr[r] .. cell_ptr[r + 1] (slot cell_s[q], Doppler cell_d[q]) get their |X|^2 in
    cell_power[q] (the front end's noise floor, frontend.py). Indices are unsigned: numba then emits no
    negative-index wrap-around, which kept these loops from vectorising (0.037 against 0.022 ms per
    reference RX, same numbers)."""
    half = nd // 2
    upper = nd - half
    s_stride = _U(rows_alloc * 2 * nd)
    for r in range(n_bins):
        base = _U(r * 2 * nd)
        for d in range(nd):
            a = flat[base + _U(2 * d)]
            b = flat[base + _U(2 * d + 1)]
            row_sum[_U(d)] = a * a + b * b
        for s in range(1, n_slots):
            b0 = base + _U(s) * s_stride
            for d in range(nd):
                a = flat[b0 + _U(2 * d)]
                b = flat[b0 + _U(2 * d + 1)]
                row_sum[_U(d)] += a * a + b * b
        ob = _U(r * nd)
        for d in range(upper):
            out[ob + _U(d + half)] += row_sum[_U(d)]
        for d in range(upper, nd):
            out[ob + _U(d - upper)] += row_sum[_U(d)]
        for q in range(cell_ptr[r], cell_ptr[r + 1]):
            i = _U(cell_s[q]) * s_stride + base + _U(2 * cell_d[q])
            a = flat[i]
            b = flat[i + _U(1)]
            cell_power[q] = a * a + b * b


class DopplerFft:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings, range_fft_size: int, n_range_bins: int):
        self.n_loops = sensor.n_loops
        self.fft_size = settings.doppler_fft_size or self.n_loops
        if self.fft_size < self.n_loops:
            raise CubecastError(f"[processing] doppler_fft_size = {self.fft_size}: must be at least the "
                                f"{self.n_loops} loops per frame")
        self.n_slots = sensor.n_slots
        self.n_rx = sensor.n_rx
        self.n_channels = sensor.n_slots * sensor.n_rx
        self.n_range_bins = n_range_bins
        self.window = make_window(settings.doppler_window, self.n_loops, settings.doppler_kaiser_beta)
        self._full = np.zeros((self.n_rx, self.n_slots, range_fft_size, self.fft_size), np.complex64)
        # [rx, slot, range, doppler]; with real sampling only the lower half of the range bins
        self.spectrum = self._full[:, :, :n_range_bins, :]
        self.power = np.zeros((n_range_bins, self.fft_size), np.float32)
        self._power_flat = self.power.reshape(-1)
        self._block_flat = [self._full[rx].reshape(-1).view(np.float32) for rx in range(self.n_rx)]
        self._row_sum = np.zeros(self.fft_size, np.float32)
        # Doppler frequency of one bin: 1 / (N_fft * T_loop)
        self.bin_hz = 1.0 / (self.fft_size * sensor.loop_period_s)

    def block(self, rx: int) -> np.ndarray:
        """The buffer [slot, range_fft_size, doppler] that receive channel `rx`'s range FFT writes."""
        return self._full[rx]

    def begin(self) -> None:
        self.power[...] = 0

    def rows(self, block: np.ndarray) -> np.ndarray:
        """The part of `block` the Doppler FFT transforms: the kept range rows."""
        return block[:, : self.n_range_bins, :]

    def transform(self, rows: np.ndarray) -> None:
        """Doppler FFT over the loops of the kept range rows (a `rows` view), in place; zero padding
        past the loops is restored first (the previous frame's transform wrote over it)."""
        if self.fft_size > self.n_loops:
            rows[:, :, self.n_loops:] = 0
        fft_inplace(rows)

    def accumulate(self, rx: int, cells: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]) -> None:
        """Add receive channel rx's block's |X|^2 to the map, and fill the sampled cells' power on the
        way: cells = (cell_ptr [n_range_bins + 1], cell_s, cell_d, cell_power), the cells sorted by
        range bin (FrontEnd.noise_cells)."""
        full = self._full
        _accumulate_power(self._block_flat[rx], full.shape[1], full.shape[2], full.shape[3], self.n_range_bins,
                          self._row_sum, self._power_flat, *cells)
