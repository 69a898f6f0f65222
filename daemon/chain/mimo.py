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

import numpy as np

from ..sensor import Sensor
from ..settings import ProcessingSettings


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
        self.slot_index = np.arange(self.n_slots)

    def doppler_hz(self, doppler_bin: np.ndarray) -> np.ndarray:
        """Doppler frequency of a (fractional, fft-shifted) Doppler bin before unfolding."""
        return (np.asarray(doppler_bin, np.float64) - self.n_doppler // 2) * self.doppler_bin_hz

    def snapshots(self, slot_values: np.ndarray, doppler_hz: np.ndarray) -> np.ndarray:
        """slot_values complex [n_det, n_slots, n_rx], doppler_hz [n_det, n_hyp]
        -> virtual snapshots complex64 [n_det, n_hyp, n_tx * n_rx] (channel k * n_rx + l)."""
        if self.compensate:
            phase = np.exp(-2j * np.pi * doppler_hz[:, :, None] * self.slot_index * self.chirp_period_s)
        else:
            phase = np.ones(doppler_hz.shape + (self.n_slots,))
        comp = phase.astype(np.complex64)[:, :, :, None] * slot_values[:, None, :, :]  # [det, hyp, slot, rx]
        virt = np.einsum("ks,dhsl->dhkl", self.decode, comp)
        return virt.reshape(virt.shape[0], virt.shape[1], self.n_tx * self.n_rx).astype(np.complex64)

    def resolve(self, slot_values: np.ndarray, doppler_bin: np.ndarray, coherence) -> tuple[np.ndarray, np.ndarray]:
        """Pick the Doppler hypothesis per detection. Returns (virtual snapshots [n_det, n_virt],
        unfolded Doppler frequency [n_det] in Hz). `coherence(snapshots [n, n_virt]) -> [n]`."""
        base = self.doppler_hz(doppler_bin)
        cand = base[:, None] + self.hypotheses[None, :] / self.loop_period_s  # [det, hyp]
        snaps = self.snapshots(slot_values, cand)
        n_det, n_hyp = cand.shape
        if n_hyp == 1:
            return snaps[:, 0], cand[:, 0]
        score = coherence(snaps.reshape(n_det * n_hyp, -1)).reshape(n_det, n_hyp)
        zero = int(np.flatnonzero(self.hypotheses == 0)[0])
        score = score.copy()
        score[:, zero] *= self.margin  # the unfolded hypothesis wins ties and near-ties
        best = np.argmax(score, axis=1)
        rows = np.arange(n_det)
        return snaps[rows, best], cand[rows, best]
