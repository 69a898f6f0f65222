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

Impairments (the scene's optional [[interferer]] and [impairments]; absent, every frame is what it
was before they were modelled, byte for byte). The order is the receiver's: interference, leakage
and echoes sum at the antenna and mixer; receiver noise joins them there (it is the LNA's, ahead of
the I/Q mixer, so the imbalance acts on it too); then the I/Q imbalance, then the DC offset, then
the ADC clips and quantises (raw_frame).

Interference (another FMCW sensor, scene.Interferer). Its chirp starting at T sweeps
f_i + S_i u (0 <= u < ramp) and reaches our RX l after the one-way delay d_l = |p - rx_l| / c. The
mixer output carries the difference of our LO and the received chirp (the same sign as an echo's):

    x(t) = A exp(j (2 pi (f_c t + S t^2 / 2 - f_i u - S_i u^2 / 2) + theta)),  t from our chirp's start
    u = t_m + t - d_l - T,   f_b = f_c + S t - f_i - S_i u   (the instantaneous beat frequency)

while the interferer is in its ramp; theta is a random phase per pair (our chirp, its chirp), seeded
by (seed, frame, interferer), since the two synthesisers' phases are unrelated. The IF filter is
applied as a filter, not a weight: the mixed chirp is made on a fine grid (IfGrid: every ADC instant
and `factor` - 1 between, 2 us beyond each end of the ADC window for the filter's response), tapered
to zero where |f_b| passes from 3 to 4 cutoffs (|H| < -76 dB there), its spectrum multiplied by |H(f)|
(zero phase, as the echoes' |H| weight: the filter's delay is not modelled) and sampled at the ADC
instants, so a fast sweep's ringing and the ramp's abrupt start and stop are in. For a slow sweep,
|S - S_i| << B^2 (the bundled sensor: B ~ 6 MHz, B^2 ~ 3.6e13 Hz/s), this is |H| at the instantaneous
beat frequency. Without the filter (if_filter=False) the band is a brick wall in time, |f_b| <= the IF
band edge (fs complex, fs / 2 real). The chirps cross where f_b = 0; the burst lasts while |f_b| is in
the band, 2 B_IF / |S - S_i| for a band of half-width B_IF. Amplitude
A = noise_rms_counts sqrt(INR) with the scene's inr_db, or from eirp_dbm by the one-way Friis link
(Friis, "A note on a simple transmission formula", 1946): Pr = EIRP + G_r + 20 log10(lambda_i /
(4 pi R)) over the noise k T0 F fs (system losses not counted), lambda_i = c / f_i, R from our
sensor's origin. An interferer behind the array's plane (y <= 0) is not received (as echoes).

Leakage: a static return of amplitude full_scale 10^(level_dbfs / 20) |H(S tau_L)| at beat S tau_L,
exp(j 2 pi (f_c tau_L + S tau_L t_n - S tau_L^2 / 2)), the same every chirp, TX and RX (its phase is
the coupling path's, taken as zero on every RX).

Phase noise (optional): the LO's phase is a Wiener process (a free-running oscillator's Lorentzian
line; common practice), E[(phi(t + T) - phi(t))^2] = D |T|, with D = 4 pi^2 f^2 10^(L(f)/10) from the
given single-sideband level L(f) at offset f (L(f) = D / (4 pi^2 f^2) far from the carrier). An echo
of delay tau is mixed with the LO that sent it, so only phi(t) - phi(t - tau) remains (the range
correlation effect), a Gaussian of variance D tau per sample, drawn exactly from independent
increments (seeded by (seed, frame, 2); the leakage's by (seed, frame, 3)); tau is each target's round
trip at the frame's first chirp (TX 0 to RX 0), the same for every TX and RX (one LO). The leakage
gets it at its own delay; the interference, whose phases are random already, does not. noise=False
leaves the phase noise in (it is the scene's).

I/Q imbalance per RX (gain g = 10^(iq_gain_db / 20), phase error phi): I' = I, Q' = g (Q cos phi -
I sin phi), i.e. x = mu z + nu conj(z) with mu = (1 + g e^{-j phi}) / 2, nu = (1 - g e^{j phi}) / 2;
a tone's image at the negative frequency sits |nu|^2 / |mu|^2 below it (the image-rejection ratio,
common practice; e.g. Razavi, RF Microelectronics, 2nd ed., 2011). Then DC: i + j q counts per RX.

Truth: interference_bursts(index) lists [chirp, rx, first, last] sample runs where the interference's
amplitude at the ADC (its complex envelope, through the IF filter) exceeds noise_rms_counts;
clipped_samples(index) counts per RX the complex samples whose I or Q is at or beyond full scale after
quantisation (count_clipped).
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
BURST_COLUMNS = ("chirp", "rx", "first_sample", "last_sample")  # interference_bursts: inclusive sample runs


def count_clipped(sensor: Sensor, payload: np.ndarray) -> np.ndarray:
    """int64 [n_rx]: complex samples per RX whose I or Q is at or beyond the ADC full scale, in a
    frame in the sensor's ADC format (int16 pairs, complex or real float32) or canonical complex64."""
    fs = sensor.adc.full_scale
    if np.iscomplexobj(payload):
        hit = (np.abs(payload.real) >= fs) | (np.abs(payload.imag) >= fs)
    elif payload.ndim == 4:  # int16 I/Q pairs
        hit = (np.abs(payload.astype(np.int32)) >= fs).any(axis=-1)
    else:
        hit = np.abs(payload) >= fs
    return np.count_nonzero(hit, axis=(0, 2)).astype(np.int64)


def _runs(flags: np.ndarray) -> np.ndarray:
    """int64 [n, 4] (chirp, rx, first, last) of the contiguous True runs along the last axis of
    flags [chirp, rx, sample]."""
    m, l, n = flags.shape
    pad = np.zeros((m, l, n + 2), np.int8)
    pad[:, :, 1:-1] = flags
    d = np.diff(pad, axis=-1)
    starts, ends = np.nonzero(d == 1), np.nonzero(d == -1)  # same (chirp, rx) order: row-major
    return np.column_stack([starts[0], starts[1], starts[2], ends[2] - 1]).astype(np.int64)


def range_equation_snr_db(sensor: Sensor, range_m, rcs_dbsm) -> np.ndarray:
    """Per-sample, per-channel SNR in dB from the radar range equation (Skolnik 2001, eq. 2.1 with
    noise k T0 F B): received power over thermal noise in the ADC sample-rate bandwidth."""
    range_m = np.asarray(range_m, np.float64)
    lam = sensor.wavelength_m
    pr_dbw = (sensor.tx_power_dbm - 30.0 + sensor.tx_gain_dbi + sensor.rx_gain_dbi
              + 20.0 * math.log10(lam) + np.asarray(rcs_dbsm, np.float64)
              - 30.0 * math.log10(4.0 * math.pi) - 40.0 * np.log10(range_m) - sensor.system_loss_db)
    return pr_dbw - _noise_dbw(sensor)


def _noise_dbw(sensor: Sensor) -> float:
    """Thermal noise k T0 F B in dBW, B = the ADC sample rate."""
    return 10.0 * math.log10(BOLTZMANN_J_PER_K * REFERENCE_TEMPERATURE_K * sensor.sample_rate_hz) \
        + sensor.noise_figure_db


def friis_inr_db(sensor: Sensor, eirp_dbm: float, range_m: float, wavelength_m: float) -> float:
    """Per-sample interference-to-noise ratio of a transmitter of this EIRP at range_m: the one-way
    Friis link (Friis 1946) into our receive gain, Pr = EIRP + G_r + 20 log10(lambda / (4 pi R)), over
    k T0 F fs."""
    pr_dbw = (eirp_dbm - 30.0 + sensor.rx_gain_dbi + 20.0 * math.log10(wavelength_m / (4.0 * math.pi * range_m)))
    return pr_dbw - _noise_dbw(sensor)


@dataclass(frozen=True)
class IfGrid:
    """The fine time grid on which interference is filtered: `factor` points per ADC sample, so that
    the grid holds every ADC instant and its rate exceeds twice the taper's end (4 cutoffs: content
    beyond is tapered away); `margin` grid points (IF_SETTLE_S) on each side of the ADC window, so the
    filter's response to a chirp just outside the window reaches into it."""

    factor: int
    rate_hz: float
    margin: int
    margin_s: float
    taper_hz: tuple[float, float]
    t_s: np.ndarray  # [(N - 1) factor + 2 margin + 1] from our chirp's start

    @classmethod
    def for_sensor(cls, s: Sensor) -> "IfGrid":
        taper = (3.0 * s.if_cutoff_hz, 4.0 * s.if_cutoff_hz)
        factor = max(2, math.ceil(2.5 * taper[1] / s.sample_rate_hz))
        rate = factor * s.sample_rate_hz
        margin = factor * math.ceil(IF_SETTLE_S * rate / factor)  # whole ADC samples
        t = s.adc_start_delay_s + np.arange(-margin, (s.samples_per_chirp - 1) * factor + margin + 1) / rate
        return cls(factor, rate, margin, margin / rate, taper, t)


IF_SETTLE_S = 2.0e-6  # the IF filter's response time allowed for (8th-order Butterworth at a few MHz: ~1 us)


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
        self._rx_impairments = self._check_impairments()
        self._interferer_amplitudes = self._check_interferers()
        self._interference_of: tuple[int, np.ndarray] | None = None  # the last frame's, made once for frame and truth
        self._if_grid = IfGrid.for_sensor(s)

    # ---- impairments: checked once ------------------------------------------------------------
    def _per_rx(self, name: str, values: np.ndarray | None, width: int) -> np.ndarray | None:
        """A per-RX array from the scene ([n] or [n, 2]; one row = every RX) as [n_rx, width]."""
        if values is None:
            return None
        s, imp = self.sensor, self.scene.impairments
        rows = values.reshape(len(values), width)
        if len(rows) not in (1, s.n_rx):
            raise CubecastError(f"{imp.where} {name} = {values.tolist()!r}: has {len(rows)} entries, sensor "
                                f"'{s.sensor_id}' has {s.n_rx} RX: give one per RX (or a single one for every RX)")
        return np.broadcast_to(rows, (s.n_rx, width)).astype(np.float64)

    def _check_impairments(self) -> dict | None:
        """The scene's [impairments] as per-RX arrays, checked against the sensor."""
        imp, s = self.scene.impairments, self.sensor
        if imp is None or not imp.any:
            return None
        out = {"dc": self._per_rx("dc_offset_counts", imp.dc_offset_counts, 2),
               "gain_db": self._per_rx("iq_gain_db", imp.iq_gain_db, 1),
               "phase_deg": self._per_rx("iq_phase_deg", imp.iq_phase_deg, 1)}
        if out["dc"] is not None and np.any(np.abs(out["dc"]) >= s.adc.full_scale):
            raise CubecastError(f"{imp.where} dc_offset_counts = {imp.dc_offset_counts.tolist()!r}: every value "
                                f"must be below the ADC full scale {s.adc.full_scale:g} of sensor '{s.sensor_id}'")
        if not s.adc.is_complex:
            for name, bad in (("iq_gain_db", out["gain_db"]), ("iq_phase_deg", out["phase_deg"]),
                              ("dc_offset_counts", None if out["dc"] is None else out["dc"][:, 1:])):
                if bad is not None and np.any(bad != 0):
                    rule = "the q offsets must be 0" if name == "dc_offset_counts" else "must be 0"
                    raise CubecastError(f"{imp.where} {name}: sensor '{s.sensor_id}' samples real (one branch, "
                                        f"no Q): {rule}")
        return out

    def _check_interferers(self) -> list[float]:
        """Per interferer: its amplitude in counts at the ADC while in band (before the IF filter);
        0 behind the array (not received, logged)."""
        s, amps = self.sensor, []
        for itf in self.scene.interferers:
            r = float(np.linalg.norm(itf.position_m))
            d = np.linalg.norm(itf.position_m[None, :] - s.rx_positions_m, axis=1)
            if d.min() < s.wavelength_m:
                raise CubecastError(f"scene '{self.scene.name}': interferer '{itf.name}' at {itf.position_m.tolist()} "
                                    f"is within a wavelength ({s.wavelength_m * 1e3:.2f} mm) of a receive antenna")
            inr = itf.inr_db if itf.inr_db is not None else friis_inr_db(
                s, itf.eirp_dbm, r, SPEED_OF_LIGHT_MPS / itf.start_frequency_hz)
            if itf.position_m[1] <= 0:
                log.warning("scene '%s': interferer '%s' is behind the array's plane (y <= 0 in the sensor frame): "
                            "not received", self.scene.name, itf.name)
                amps.append(0.0)
            else:
                amps.append(s.noise_rms_counts * 10.0 ** (inr / 20.0))
        return amps

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
        pn_rng = np.random.Generator(np.random.PCG64([self.seed, index, 2])) \
            if self._phase_noise_diffusion() is not None else None
        for ti in range(len(self.scene.targets)):
            if pn_rng is not None:  # one LO for every TX and RX: the round trip at the first chirp, TX 0 / RX 0
                pn = self.phase_noise_factor(float(d_tx[ti, 0, 0] + d_rx[ti, 0, 0]) / c, pn_rng)
            for j in range(plan.active_tx.shape[0]):
                w = plan.active_w[j]
                k = plan.active_tx[j]
                tau = (d_tx[ti, m_idx, k][:, None] + d_rx[ti]) / c  # [M, L]
                gain = self.if_gain(s.slope_hz_per_s * tau)  # [M, L]: the IF filter at each echo's beat frequency
                # phase in cycles; the large f_c*tau term is reduced modulo 1 before it meets 2*pi
                cyc0 = np.mod(s.start_frequency_hz * tau - 0.5 * s.slope_hz_per_s * tau * tau, 1.0)
                cyc = cyc0[:, :, None] + (s.slope_hz_per_s * tau)[:, :, None] * t_n[None, None, :]
                echo = (amp[ti] * w * front[ti])[:, None, None] * gain[:, :, None] * np.exp(2j * np.pi * cyc)
                if pn_rng is not None:
                    echo *= pn[:, None, :]
                out += echo
        return out

    def _phase_noise_diffusion(self) -> float | None:
        """D in rad^2/s of the LO's Wiener phase (module docstring), or None without phase noise."""
        imp = self.scene.impairments
        if imp is None or imp.phase_noise_dbc_per_hz is None:
            return None
        return 4.0 * math.pi ** 2 * imp.phase_noise_offset_hz ** 2 * 10.0 ** (imp.phase_noise_dbc_per_hz / 10.0)

    def phase_noise_factor(self, tau_s: float, rng: np.random.Generator) -> np.ndarray:
        """complex [chirp, sample]: exp(j (phi(t_n) - phi(t_n - tau_s))) of a Wiener phase, drawn from
        the independent increments between the sorted instants t_n and t_n - tau_s of each chirp."""
        s, t_n = self.sensor, self._plan.fast_time_s
        grid = np.concatenate([t_n, t_n - tau_s])
        order = np.argsort(grid, kind="stable")
        steps = np.diff(grid[order])
        walk = np.zeros((s.chirps_per_frame, len(grid)))
        walk[:, 1:] = np.cumsum(rng.standard_normal((s.chirps_per_frame, len(steps)))
                                * np.sqrt(self._phase_noise_diffusion() * steps), axis=1)
        at = np.empty_like(walk)
        at[:, order] = walk  # the path at each instant, in grid order
        n = len(t_n)
        return np.exp(1j * (at[:, :n] - at[:, n:]))

    # ---- interference and leakage --------------------------------------------------------------
    def _interferer_chirps(self, itf, t0_s: float, t1_s: float) -> np.ndarray:
        """Start times of the interferer's chirps whose ramp overlaps [t0_s, t1_s) (transmit times)."""
        p_c = itf.chirp_period_s
        if itf.chirps == 0:
            q = np.arange(max(0, math.ceil((t0_s - itf.ramp_time_s - itf.start_time_s) / p_c)),
                          max(0, math.floor((t1_s - itf.start_time_s) / p_c) + 1))
            return itf.start_time_s + q * p_c
        burst_s = (itf.chirps - 1) * p_c + itf.ramp_time_s
        p = np.arange(max(0, math.ceil((t0_s - burst_s - itf.start_time_s) / itf.frame_period_s)),
                      max(0, math.floor((t1_s - itf.start_time_s) / itf.frame_period_s) + 1))
        out = []
        for burst_start in itf.start_time_s + p * itf.frame_period_s:
            q = np.arange(max(0, math.ceil((t0_s - itf.ramp_time_s - burst_start) / p_c)),
                          min(itf.chirps, max(0, math.floor((t1_s - burst_start) / p_c) + 1)))
            out.append(burst_start + q * p_c)
        starts = np.concatenate(out) if out else np.zeros(0)
        return starts[(starts + itf.ramp_time_s > t0_s) & (starts < t1_s)]

    def interference(self, index: int) -> np.ndarray:
        """complex128 [chirp, rx, sample]: every interferer's signal at the ADC in frame `index` (through
        the IF filter, before the receiver's imbalance and noise); zeros without interferers."""
        if self._interference_of is not None and self._interference_of[0] == index:
            return self._interference_of[1].copy()
        s, plan = self.sensor, self._plan
        out = np.zeros((s.chirps_per_frame, s.n_rx, s.samples_per_chirp), np.complex128)
        t_n = plan.fast_time_s
        t_m = self.frame_time_s(index) + plan.chirp_offsets_s
        for k, (itf, amp) in enumerate(zip(self.scene.interferers, self._interferer_amplitudes)):
            if amp == 0.0:
                continue
            d = np.linalg.norm(itf.position_m[None, :] - s.rx_positions_m, axis=1) / SPEED_OF_LIGHT_MPS  # [L]
            rng = np.random.Generator(np.random.PCG64([self.seed, index, 1, k]))
            for m in range(s.chirps_per_frame):
                starts = self._interferer_chirps(itf, t_m[m] + t_n[0] - d.max() - self._if_grid.margin_s,
                                                 t_m[m] + t_n[-1] - d.min() + self._if_grid.margin_s)
                for start in starts:
                    theta = rng.uniform(0.0, 1.0)  # cycles: unrelated synthesiser phases
                    if self.if_filter:
                        self._add_filtered(out[m], itf, amp, t_m[m] - start, d, theta)
                    else:
                        x, beat = self._mixed(itf, t_m[m] - start, d, theta, t_n)
                        out[m] += amp * x * (np.abs(beat) <= s.if_bandwidth_hz)
        self._interference_of = (index, out.copy())
        return out

    def _mixed(self, itf, offset_s: float, d_s: np.ndarray, theta: float, t_s: np.ndarray):
        """Our LO times the conjugate of the interferer's received chirp, at fast times t_s (from our
        chirp's start; its chirp started offset_s before ours): (exp(j phase) where its ramp is on, else
        0, [L, T]; the instantaneous beat frequency [L, T])."""
        s = self.sensor
        u = offset_s + t_s[None, :] - d_s[:, None]  # [L, T] time into its ramp, at reception
        on = (u >= 0.0) & (u < itf.ramp_time_s)
        beat = (s.start_frequency_hz + s.slope_hz_per_s * t_s)[None, :] - (itf.start_frequency_hz + itf.slope_hz_per_s * u)
        cyc = (s.start_frequency_hz * t_s + 0.5 * s.slope_hz_per_s * t_s * t_s)[None, :] \
            - itf.start_frequency_hz * u - 0.5 * itf.slope_hz_per_s * u * u + theta
        return on * np.exp(2j * np.pi * np.mod(cyc, 1.0)), beat

    def _add_filtered(self, out_m: np.ndarray, itf, amp: float, offset_s: float, d_s: np.ndarray,
                      theta: float) -> None:
        """One interferer chirp through the IF filter into out_m [rx, sample]: the mixed chirp on a
        fine grid (IfGrid), tapered to zero between 3 and 4 cutoffs (beyond, |H| < -76 dB), its
        spectrum times |H(f)| (zero phase, as for echoes), sampled at the ADC instants."""
        g, s = self._if_grid, self.sensor
        # where any RX can see it: in its ramp and within the taper (the RX differ by picoseconds)
        u = offset_s + g.t_s - d_s.mean()
        slack = float(np.ptp(d_s)) + 1.0 / g.rate_hz
        beat = s.start_frequency_hz + s.slope_hz_per_s * g.t_s - itf.start_frequency_hz - itf.slope_hz_per_s * u
        live = np.flatnonzero((u >= -slack) & (u < itf.ramp_time_s + slack)
                              & (np.abs(beat) <= g.taper_hz[1] + abs(itf.slope_hz_per_s) * slack))
        if not live.size:
            return
        a = max(0, int(live[0]) - g.margin)
        a -= (a - g.margin) % g.factor  # start on an ADC instant
        b = min(len(g.t_s), int(live[-1]) + g.margin + 1)
        x, beat = self._mixed(itf, offset_s, d_s, theta, g.t_s[a:b])
        f = np.abs(beat)
        x *= np.where(f <= g.taper_hz[0], 1.0, np.where(
            f >= g.taper_hz[1], 0.0, 0.5 + 0.5 * np.cos(np.pi * (f - g.taper_hz[0]) / (g.taper_hz[1] - g.taper_hz[0]))))
        n_fft = 1 << int(math.ceil(math.log2(b - a + 2 * g.margin)))
        h = s.if_filter_gain(np.fft.fftfreq(n_fft, 1.0 / g.rate_hz))
        y = np.fft.ifft(np.fft.fft(x, n_fft, axis=1) * h[None, :], axis=1)[:, : b - a : g.factor]
        n0 = (a - g.margin) // g.factor
        n1 = min(n0 + y.shape[1], out_m.shape[1])
        out_m[:, max(n0, 0):n1] += amp * y[:, max(0, -n0): n1 - n0]

    def interference_bursts(self, index: int, interference: np.ndarray | None = None) -> np.ndarray:
        """int64 [n, 4] (BURST_COLUMNS: chirp, rx, first, last; inclusive) of frame `index`: the runs of
        samples where the interference's amplitude at the ADC exceeds noise_rms_counts."""
        x = self.interference(index) if interference is None else interference
        return _runs(np.abs(x) > self.sensor.noise_rms_counts)

    def leakage(self) -> np.ndarray | None:
        """complex128 [sample]: the TX-to-RX leakage tone of every chirp and RX, or None."""
        imp, s = self.scene.impairments, self.sensor
        if imp is None or imp.leakage_level_dbfs is None:
            return None
        tau = imp.leakage_delay_s
        amp = s.adc.full_scale * 10.0 ** (imp.leakage_level_dbfs / 20.0) * float(self.if_gain(s.slope_hz_per_s * tau))
        cyc0 = math.fmod(s.start_frequency_hz * tau - 0.5 * s.slope_hz_per_s * tau * tau, 1.0)
        return amp * np.exp(2j * np.pi * (cyc0 + s.slope_hz_per_s * tau * self._plan.fast_time_s))

    def _receiver(self, data: np.ndarray) -> np.ndarray:
        """I/Q imbalance (I' = I, Q' = g (Q cos phi - I sin phi)), then DC, per RX, in place."""
        rx = self._rx_impairments
        if rx["gain_db"] is not None or rx["phase_deg"] is not None:
            g = 10.0 ** ((rx["gain_db"] if rx["gain_db"] is not None else np.zeros((self.sensor.n_rx, 1))) / 20.0)
            phi = np.radians(rx["phase_deg"] if rx["phase_deg"] is not None else np.zeros((self.sensor.n_rx, 1)))
            i_part = data.real.copy()
            data.imag = g[None, :, :] * (data.imag * np.cos(phi)[None] - i_part * np.sin(phi)[None])
        if rx["dc"] is not None:
            data += (rx["dc"][:, 0] + 1j * rx["dc"][:, 1])[None, :, None]
        return data

    # ---- frames ------------------------------------------------------------------------------------
    def frame(self, index: int) -> np.ndarray:
        """Canonical complex64 frame `index` with receiver noise (if enabled) and the scene's
        impairments (interference, leakage, I/Q imbalance, DC: module docstring)."""
        s = self.sensor
        data = self.clean_frame(index)
        if self.scene.interferers:
            data += self.interference(index)
        leak = self.leakage()
        if leak is not None:
            if self._phase_noise_diffusion() is None:
                data += leak[None, None, :]
            else:
                rng = np.random.Generator(np.random.PCG64([self.seed, index, 3]))
                data += leak[None, None, :] * self.phase_noise_factor(self.scene.impairments.leakage_delay_s,
                                                                       rng)[:, None, :]
        if not s.adc.is_complex:
            data = data.real.astype(np.complex128)
        if self.noise:
            rng = np.random.Generator(np.random.PCG64([self.seed, index]))
            sigma = s.noise_rms_counts / math.sqrt(2.0)
            noise = rng.standard_normal((2,) + data.shape) * sigma
            data = data + noise[0] + (1j * noise[1] if s.adc.is_complex else 0.0)
        if self._rx_impairments is not None:
            data = self._receiver(data)
        return data.astype(np.complex64)

    def raw_frame(self, index: int) -> np.ndarray:
        """Frame `index` as the board would deliver it: quantised, clipped and in its I/Q conventions."""
        return self.sensor.canonical_to_raw(self.frame(index))

    def raw_frame_report(self, index: int) -> tuple[np.ndarray, np.ndarray]:
        """(raw_frame(index), its clipped samples per RX: count_clipped, int64 [n_rx])."""
        raw = self.raw_frame(index)
        return raw, count_clipped(self.sensor, raw)

    def clipped_samples(self, index: int) -> np.ndarray:
        """int64 [n_rx]: complex samples of raw_frame(index) per RX with I or Q at or beyond full scale."""
        return self.raw_frame_report(index)[1]
