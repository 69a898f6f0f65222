"""The signal model: a scene of point targets seen by a sensor, as canonical ADC frames.

For chirp m, TX k, RX l and fast time t_n = adc_start_delay + n / fs (from the chirp start):

    s[m, l, n] = sum_targets sum_k  a * w_k(m) * exp(j 2 pi (f_c tau + S tau t_n - S tau^2 / 2))

with tau = (|p(t_m) - tx_k| + |p(t_m) - rx_l|) / c the exact round-trip delay at the start of chirp m
(no far-field approximation), f_c the chirp start frequency, S the slope and w_k(m) the TX code in
that chirp's MIMO slot (1 or 0 in TDM, +1/-1 in BPM). This is the dechirped (mixer output) FMCW
model written in README; the conjugate-free convention puts a target at a positive beat frequency.

Amplitude: a = noise_rms_counts * sqrt(SNR), with SNR the per-sample, per-channel SNR either given
by the scene or from the radar range equation (Skolnik, Introduction to Radar Systems, 3rd ed., 2001):
    SNR = Pt Gt Gr lambda^2 sigma / ((4 pi)^3 R^4 k T0 F B L),   B = the ADC sample rate.
Receiver noise is circular complex Gaussian with total power noise_rms_counts^2 per sample.

The receiver's IF low-pass (the sensor's [if_filter], a Butterworth; see sensor.py) weights each
echo by its magnitude response |H(S tau)| at the echo's beat frequency, per chirp, TX and RX, before
sampling: an echo from beyond the maximum range is attenuated before it folds into the band, as on
a board. The SNR above (a scene's snr_db or the range equation) is the echo's before the filter; the
ground truth's snr_db is after it (what the ADC sees). The noise stays white at noise_rms_counts:
it is specified at the ADC. Simulator(if_filter=False) leaves the filter out, as captures simulated
before it was modelled were made (the bundled captures are such recorded files).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

from .errors import CubecastError
from .scene import Scene
from .sensor import BOLTZMANN_J_PER_K, REFERENCE_TEMPERATURE_K, SPEED_OF_LIGHT_MPS, Sensor

log = logging.getLogger(__name__)

TRUTH_COLUMNS = ("x_m", "y_m", "z_m", "vx_mps", "vy_mps", "vz_mps", "range_m", "azimuth_deg",
                 "elevation_deg", "velocity_mps", "snr_db", "in_fov")


def range_equation_snr_db(sensor: Sensor, range_m, rcs_dbsm) -> np.ndarray:
    """Per-sample, per-channel SNR in dB from the radar range equation (Skolnik 2001, eq. 2.1 with
    noise k T0 F B): received power over thermal noise in the ADC sample-rate bandwidth."""
    range_m = np.asarray(range_m, np.float64)
    lam = sensor.wavelength_m
    pr_dbw = (sensor.tx_power_dbm - 30.0 + sensor.tx_gain_dbi + sensor.rx_gain_dbi
              + 20.0 * math.log10(lam) + np.asarray(rcs_dbsm, np.float64)
              - 30.0 * math.log10(4.0 * math.pi) - 40.0 * np.log10(range_m) - sensor.system_loss_db)
    noise_dbw = 10.0 * math.log10(BOLTZMANN_J_PER_K * REFERENCE_TEMPERATURE_K * sensor.sample_rate_hz) \
        + sensor.noise_figure_db
    return pr_dbw - noise_dbw


@dataclass(frozen=True)
class _Plan:
    """Chirp timing and the active (chirp, TX, weight) triples, computed once per simulator."""

    chirp_offsets_s: np.ndarray  # [M] chirp start times within the frame
    active_tx: np.ndarray  # [J, M] TX index of the j-th active transmitter in chirp m
    active_w: np.ndarray  # [J, M] its code weight (0 where that chirp has fewer active TX)
    fast_time_s: np.ndarray  # [N]


class Simulator:
    """Makes canonical frames (complex64 [chirp, rx, sample]) of a scene. Deterministic: frame i's
    noise comes from numpy's PCG64 seeded with (seed, i), so any frame can be made on its own."""

    def __init__(self, sensor: Sensor, scene: Scene, seed: int = 0, noise: bool = True, if_filter: bool = True):
        # a platform-frame scene is simulated as this sensor sees it, through its [pose]
        self.scene = scene.in_sensor_frame(sensor.pose_rotation, sensor.pose_position_m)
        self.sensor, self.seed, self.noise, self.if_filter = sensor, int(seed), noise, if_filter
        s = sensor
        m = np.arange(s.chirps_per_frame)
        code = s.mimo_code[m % s.n_slots]  # [M, n_tx]
        n_active = int((code != 0).sum(axis=1).max())
        active_tx = np.zeros((n_active, len(m)), np.int64)
        active_w = np.zeros((n_active, len(m)), np.float64)
        for mi in range(len(m)):
            ks = np.flatnonzero(code[mi])
            active_tx[: len(ks), mi] = ks
            active_w[: len(ks), mi] = code[mi, ks]
        self._plan = _Plan(m * s.chirp_period_s, active_tx, active_w,
                           s.adc_start_delay_s + np.arange(s.samples_per_chirp) / s.sample_rate_hz)
        self._warn_beyond_range()

    def if_gain(self, beat_hz) -> np.ndarray:
        """Amplitude weight of echoes at these beat frequencies: the sensor's IF filter |H(f)|, or 1
        without the filter."""
        if not self.if_filter:
            return np.ones(np.shape(beat_hz))
        return self.sensor.if_filter_gain(beat_hz)

    def apparent_range_m(self, range_m) -> np.ndarray:
        """Where an echo from range_m shows after sampling: its beat frequency folded into the IF
        band (modulo fs; for real sampling mirrored into 0..fs/2), as a range."""
        s = self.sensor
        f = np.mod(s.beat_frequency_hz(range_m), s.sample_rate_hz)
        if not s.adc.is_complex:
            f = np.minimum(f, s.sample_rate_hz - f)
        return f * SPEED_OF_LIGHT_MPS / (2.0 * s.slope_hz_per_s)

    def _warn_beyond_range(self) -> None:
        s = self.sensor
        r0 = np.linalg.norm(self.scene.positions_at(np.zeros(1))[:, 0, :], axis=1)
        for t, r in zip(self.scene.targets, r0):
            if r > s.max_range_m:
                loss_db = -20.0 * math.log10(max(float(self.if_gain(s.beat_frequency_hz(r))), 1e-300))
                log.warning("scene '%s': target '%s' at %.2f m (t = 0) lies beyond the maximum range %.2f m: its echo "
                            "folds to %.2f m, %s", self.scene.name, t.name, r, s.max_range_m,
                            float(self.apparent_range_m(r)),
                            f"attenuated {loss_db:.1f} dB by the IF filter" if self.if_filter else "without IF filter")

    def _check_clear_of_antennas(self, distances_m: np.ndarray, t_s: np.ndarray, index: int) -> None:
        """distances [T, M, K]: every target stays at least a wavelength from every antenna (a point
        echo in the model; a straight-line motion may pass through the sensor)."""
        lam = self.sensor.wavelength_m
        if distances_m.size and distances_m.min() < lam:
            ti, mi = np.unravel_index(int(np.argmin(distances_m)), distances_m.shape)[:2]
            raise CubecastError(
                f"scene '{self.scene.name}': target '{self.scene.targets[ti].name}' comes within "
                f"{distances_m[ti, mi].min():.3g} m of an antenna at t = {t_s[mi]:.6g} s (frame {index}): a target "
                f"must stay at least a wavelength ({lam * 1e3:.2f} mm) from the sensor; its straight-line motion "
                f"runs through it")

    def target_snr_db(self, range_m: np.ndarray) -> np.ndarray:
        """[n_t] per-sample SNR for each target at the given ranges (explicit value if the scene has one),
        before the IF filter."""
        out = np.empty(len(self.scene.targets))
        for i, t in enumerate(self.scene.targets):
            out[i] = t.snr_db if t.snr_db is not None else range_equation_snr_db(self.sensor, range_m[i], t.rcs_dbsm)
        return out

    def frame_time_s(self, index: int) -> float:
        return index * self.sensor.frame_period_s

    def measurement_epoch_s(self, index: int) -> float:
        """The instant frame `index` measures: the middle of its chirp burst, the mean of its chirps'
        start times (the signal model takes each chirp's delay at its start). A target moving during
        the burst is seen at its mean position, so ground truth is given at this epoch."""
        s = self.sensor
        return self.frame_time_s(index) + 0.5 * (s.chirps_per_frame - 1) * s.chirp_period_s

    def truth(self, index: int) -> np.ndarray:
        """Ground truth at the measurement epoch of frame `index`: [n_targets, len(TRUTH_COLUMNS)];
        snr_db is the per-sample SNR at the ADC, after the IF filter."""
        s = self.sensor
        p = self.scene.positions_at(np.array([self.measurement_epoch_s(index)]))[:, 0, :]
        v = np.stack([t.velocity_mps for t in self.scene.targets])
        r = np.linalg.norm(p, axis=1)
        self._check_clear_of_antennas(r[:, None, None], np.array([self.measurement_epoch_s(index)]), index)
        az = np.degrees(np.arctan2(p[:, 0], p[:, 1]))
        el = np.degrees(np.arcsin(np.clip(p[:, 2] / r, -1, 1)))
        vr = np.einsum("ij,ij->i", p, v) / r
        snr = self.target_snr_db(r) + 20.0 * np.log10(np.maximum(self.if_gain(s.beat_frequency_hz(r)), 1e-300))
        in_fov = (np.abs(az) <= s.fov_half_azimuth_deg) & (np.abs(el) <= s.fov_half_elevation_deg) \
            & (r <= s.max_range_m) & (p[:, 1] > 0)
        return np.column_stack([p, v, r, az, el, vr, snr, in_fov.astype(np.float64)])

    def clean_frame(self, index: int) -> np.ndarray:
        """The noise-free signal of frame `index`, complex128 [chirp, rx, sample]."""
        s, plan = self.sensor, self._plan
        c = SPEED_OF_LIGHT_MPS
        t_m = self.frame_time_s(index) + plan.chirp_offsets_s
        pos = self.scene.positions_at(t_m)  # [T, M, 3]
        d_tx = np.linalg.norm(pos[:, :, None, :] - s.tx_positions_m[None, None], axis=-1)  # [T, M, K]
        d_rx = np.linalg.norm(pos[:, :, None, :] - s.rx_positions_m[None, None], axis=-1)  # [T, M, L]
        self._check_clear_of_antennas(np.concatenate([d_tx, d_rx], axis=-1), t_m, index)
        r0 = np.linalg.norm(pos[:, 0, :], axis=-1)
        amp = s.noise_rms_counts * np.sqrt(10.0 ** (self.target_snr_db(r0) / 10.0))  # [T]
        # the array radiates forward only: a target behind its plane (y <= 0) returns nothing (a
        # simplification of the back lobe; on a platform, another sensor's side of the scene)
        front = (pos[:, :, 1] > 0).astype(np.float64)  # [T, M]
        out = np.zeros((s.chirps_per_frame, s.n_rx, s.samples_per_chirp), np.complex128)
        m_idx = np.arange(s.chirps_per_frame)
        t_n = plan.fast_time_s
        for ti in range(len(self.scene.targets)):
            for j in range(plan.active_tx.shape[0]):
                w = plan.active_w[j]
                k = plan.active_tx[j]
                tau = (d_tx[ti, m_idx, k][:, None] + d_rx[ti]) / c  # [M, L]
                gain = self.if_gain(s.slope_hz_per_s * tau)  # [M, L]: the IF filter at each echo's beat frequency
                # phase in cycles; the large f_c*tau term is reduced modulo 1 before it meets 2*pi
                cyc0 = np.mod(s.start_frequency_hz * tau - 0.5 * s.slope_hz_per_s * tau * tau, 1.0)
                cyc = cyc0[:, :, None] + (s.slope_hz_per_s * tau)[:, :, None] * t_n[None, None, :]
                out += (amp[ti] * w * front[ti])[:, None, None] * gain[:, :, None] * np.exp(2j * np.pi * cyc)
        return out

    def frame(self, index: int) -> np.ndarray:
        """Canonical complex64 frame `index` with receiver noise (if enabled)."""
        s = self.sensor
        data = self.clean_frame(index)
        if not s.adc.is_complex:
            data = data.real.astype(np.complex128)
        if self.noise:
            rng = np.random.Generator(np.random.PCG64([self.seed, index]))
            sigma = s.noise_rms_counts / math.sqrt(2.0)
            noise = rng.standard_normal((2,) + data.shape) * sigma
            data = data + noise[0] + (1j * noise[1] if s.adc.is_complex else 0.0)
        return data.astype(np.complex64)

    def raw_frame(self, index: int) -> np.ndarray:
        """Frame `index` as the board would deliver it: quantised, clipped and in its I/Q conventions."""
        return self.sensor.canonical_to_raw(self.frame(index))
