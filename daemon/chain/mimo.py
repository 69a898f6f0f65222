"""MIMO demultiplexing into the virtual array, per detection, with Doppler-induced phase
compensation and TDM velocity unfolding.

A target with Doppler frequency f_d advances its phase by 2 pi f_d T_c from one MIMO slot to the
next. In TDM each TX owns one slot, so without compensation the virtual channels of TX k carry an
extra phase 2 pi f_d s_k T_c, which reads as a false angle (common practice). We multiply slot s by
exp(-j 2 pi f_d s T_c) before decoding (TDM: picking each TX's slot; BPM: applying the inverse code
matrix), using the refined Doppler frequency.

The Doppler FFT over loops only knows f_d modulo 1 / T_loop. For TDM with N slots the true f_d is
one of N hypotheses f_d + q / T_loop; each gives a different slot compensation, and only the right
one makes the virtual array coherent. The hypothesis whose compensated snapshot has the strongest
angle-spectrum peak wins (it must beat the unfolded q = 0 by `unfolding_margin_db`), which extends
the unambiguous velocity N_tx times (common practice).
"""

from __future__ import annotations

import numba
import numpy as np

from ..sensor import Sensor
from ..settings import ProcessingSettings


@numba.njit(cache=True, nogil=True)
def _snapshots(values, doppler_hz, decode, chirp_period_s, compensate, comp, out):
    """out[i, h, k n_rx + l] = sum_s decode[k, s] exp(-j 2 pi f_ih s T_c) values[i, l, s]: the slot
    values of detection i (per receive channel and slot, at its refined frequencies), compensated
    for Doppler hypothesis f_ih = doppler_hz[i, h] (or not, without `compensate`) and decoded into
    the virtual array."""
    n_det, n_rx, n_slots = values.shape
    n_tx = decode.shape[0]
    n_hyp = doppler_hz.shape[1]
    for i in range(n_det):
        for h in range(n_hyp):
            for s in range(n_slots):
                if compensate:
                    arg = -2.0 * np.pi * doppler_hz[i, h] * s * chirp_period_s
                    ph = np.complex64(complex(np.cos(arg), np.sin(arg)))
                else:
                    ph = np.complex64(1.0)
                for l in range(n_rx):
                    comp[s, l] = ph * np.complex64(values[i, l, s])
            for k in range(n_tx):
                for l in range(n_rx):
                    acc = np.complex64(0.0)
                    for s in range(n_slots):
                        acc += decode[k, s] * comp[s, l]
                    out[i, h, k * n_rx + l] = acc


@numba.njit(cache=True, nogil=True)
def _hypotheses(doppler_bin, half, bin_hz, offsets_hz, out):
    """out[i, h] = (doppler_bin[i] - half) bin_hz + offsets_hz[h]: the Doppler frequency of a
    fractional fft-shifted bin, plus each unfolding hypothesis."""
    for i in range(doppler_bin.shape[0]):
        base = (doppler_bin[i] - half) * bin_hz
        for h in range(offsets_hz.shape[0]):
            out[i, h] = base + offsets_hz[h]


@numba.njit(cache=True, nogil=True)
def _pick(score, zero, margin, snaps, cand, out_snaps, out_hz):
    """Per detection the hypothesis of highest score, the unfolded one (index `zero`) scaled by
    `margin` (float32, as the scores); the first on ties."""
    n_det, n_hyp = score.shape
    for i in range(n_det):
        best = 0
        top = score[i, 0] * margin if zero == 0 else score[i, 0]
        for h in range(1, n_hyp):
            v = score[i, h] * margin if h == zero else score[i, h]
            if v > top:
                top = v
                best = h
        for c in range(snaps.shape[2]):
            out_snaps[i, c] = snaps[i, best, c]
        out_hz[i] = cand[i, best]


class MimoDecoder:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings, doppler_bin_hz: float, n_doppler: int):
        self.n_slots, self.n_rx, self.n_tx = sensor.n_slots, sensor.n_rx, sensor.n_tx
        self.chirp_period_s = sensor.chirp_period_s
        self.loop_period_s = sensor.loop_period_s
        self.doppler_bin_hz = doppler_bin_hz
        self.n_doppler = n_doppler
        self.compensate = settings.doppler_compensation
        # decode matrix [tx, slot]: pseudo-inverse of the code [slot, tx] (TDM: a permutation)
        self.decode = np.linalg.pinv(sensor.mimo_code).astype(np.complex64)
        # hypotheses q (in units of 1/T_loop) that keep the velocity within the unfolded interval
        n = self.n_slots if (settings.velocity_unfolding and self.compensate and sensor.mimo_scheme == "tdm") else 1
        # q = -(N//2) .. N//2: N hypotheses for odd N, N + 1 for even N (both edges of the interval)
        self.hypotheses = np.arange(-(n // 2), n // 2 + 1)
        self.margin = 10.0 ** (settings.unfolding_margin_db / 10.0)
        self._comp = np.empty((self.n_slots, self.n_rx), np.complex64)
        self._zero = int(np.flatnonzero(self.hypotheses == 0)[0])
        self._offsets_hz = self.hypotheses / self.loop_period_s
        self._margin32 = np.float32(self.margin)
        self._capacity = 0
        self._reserve(64)

    def _reserve(self, n_det: int) -> None:
        """Buffers for n_det detections (grown, never shrunk)."""
        if n_det <= self._capacity:
            return
        n_hyp, n_virt = self.hypotheses.shape[0], self.n_tx * self.n_rx
        self._capacity = n_det = max(n_det, 2 * self._capacity)
        self._cand = np.empty((n_det, n_hyp), np.float64)
        self._snaps = np.empty((n_det, n_hyp, n_virt), np.complex64)

    def snapshots(self, values: np.ndarray, doppler_hz: np.ndarray) -> np.ndarray:
        """Virtual snapshots complex64 [n_det, n_hyp, n_tx * n_rx] (channel k * n_rx + l) of the slot
        values [n_det, rx, slot] for the Doppler hypotheses doppler_hz [n_det, n_hyp]."""
        n_det, n_hyp = doppler_hz.shape
        out = np.empty((n_det, n_hyp, self.n_tx * self.n_rx), np.complex64)
        _snapshots(np.ascontiguousarray(values), np.ascontiguousarray(doppler_hz, np.float64), self.decode,
                   self.chirp_period_s, self.compensate, self._comp, out)
        return out

    def resolve(self, values: np.ndarray, doppler_bin: np.ndarray, coherence) -> tuple[np.ndarray, np.ndarray]:
        """Pick the Doppler hypothesis per detection from its slot values [n_det, rx, slot] (at the
        refined frequencies), doppler_bin the refined fft-shifted Doppler bin. Returns (virtual
        snapshots [n_det, n_virt], unfolded Doppler frequency [n_det] in Hz), both the caller's.
        `coherence(snapshots [n, n_virt]) -> [n]` float32."""
        n_det = values.shape[0]
        n_hyp = self.hypotheses.shape[0]
        self._reserve(n_det)
        cand, snaps = self._cand[:n_det], self._snaps[:n_det]
        _hypotheses(np.asarray(doppler_bin, np.float64), self.n_doppler // 2, self.doppler_bin_hz,
                    self._offsets_hz, cand)
        _snapshots(values, cand, self.decode, self.chirp_period_s, self.compensate, self._comp, snaps)
        if n_hyp == 1:
            return snaps[:, 0].copy(), cand[:, 0].copy()
        score = coherence(snaps.reshape(n_det * n_hyp, -1)).reshape(n_det, n_hyp)
        out_snaps = np.empty((n_det, snaps.shape[2]), np.complex64)
        out_hz = np.empty(n_det, np.float64)
        _pick(score, self._zero, self._margin32, snaps, cand, out_snaps, out_hz)
        return out_snaps, out_hz

    def virtual_snr_factor(self) -> float:
        """SNR of a decoded virtual channel over that of one slot value: the decoding sums slots with
        weights decode[k, s], so noise grows by sum_s |decode[k, s]|^2 while the target keeps its
        amplitude (mean over TX; 1 for TDM, n_slots for a Hadamard BPM code)."""
        return float(1.0 / np.mean(np.sum(np.abs(self.decode.astype(np.complex128)) ** 2, axis=1)))
