"""I/Q imbalance of each receive channel, estimated blind from a capture (`cubecast calibrate`).

The model (README "I/Q imbalance"; the convention every part of cubecast shares): per RX the Q branch
has gain g (relative to I) and phase error phi, so the ideal sample z = I + jQ arrives as

    I' = I,   Q' = g (Q cos phi - I sin phi)

or x = mu z + nu conj(z), mu = (1 + g e^{-j phi}) / 2, nu = (1 - g e^{j phi}) / 2: every echo gets a
mirror at the negative beat frequency (and negative Doppler) |nu|^2 / |mu|^2 below it, the image-
rejection ratio IRR = (1 + 2 g cos phi + g^2) / (1 - 2 g cos phi + g^2) (common practice; e.g. Razavi,
RF Microelectronics, 2nd ed., 2011). The chain undoes it with I = I', Q = (Q'/g + I' sin phi) / cos phi.

The blind estimate. A circular signal has E[I^2] = E[Q^2] and E[IQ] = 0; receiver noise is circular,
and so is a tone over many cycles. Then E[Q'^2] / E[I'^2] = g^2 and E[I'Q'] / sqrt(E[I'^2] E[Q'^2]) =
-sin phi, so

    g = sqrt(S_QQ / S_II),   sin phi = -S_IQ / sqrt(S_II S_QQ)

from the sums S over the samples. What is not circular is what repeats from chirp to chirp: the DC
offset of each channel, TX-to-RX leakage and every static echo (the reference reflector above all) are
the same waveform in every chirp of a MIMO slot. So, per frame, slot, RX and fast-time sample, the mean
over the slot's L loops is removed first (it takes the DC with it); what is left is receiver noise
and moving echoes, and its second moments are a Wishart sum with N = frames x slots x samples x (L - 1)
degrees of freedom per RX (the imbalance is linear in I and Q, so the model holds for the residual
exactly). A sensor with a single loop per frame cannot be estimated this way (refused).

Uncertainty. For N independent circular Gaussian samples, (I', Q'/g) is a bivariate normal pair with
unit-free correlation rho = -sin phi, the estimate of sin phi is minus the sample correlation
coefficient, whose large-sample variance is (1 - rho^2)^2 / N (Fisher, Biometrika, 1915), and log g is
half the log ratio of the two sample variances, of variance (2/N + 2/N - 2 * 2 rho^2 / N) / 4 =
(1 - rho^2) / N (delta method, the covariance of two sample variances being 2 rho^2 / N; common
practice). With 1 - rho^2 = cos^2 phi:

    sd(phi) = cos phi / sqrt(N) rad,   sd(g) = g cos phi / sqrt(N)

uncorrelated (swapping the roles of I and Q flips log g and leaves the correlation). These are for
receiver noise alone: a moving echo of power P per sample over noise s2 (circular, deterministic)
lowers the error to sqrt((s2^2 + 2 P s2) / (P + s2)^2) of them (the cross terms s n have variance
P s2 / 2 per sample against (P + s2)^2 / 4), so the reported sigmas are an upper bound then. Corrected with
estimates off by e = dg / g and d = dphi, the residual imbalance is, to first order, (-e + d tan phi,
-e tan phi - d), so the residual image ratio is (e^2 + d^2) / (4 cos^2 phi): exponentially distributed
with mean 1 / (2 N) whatever (g, phi) are. The expected image rejection after correction is therefore
10 log10(2 N) dB (a fact the proof test checks by Monte Carlo and through the chain).

Checks (each names the channel, the cause and what would help): refused when the ADC samples real
values (no Q branch), when there is a single loop per frame, when the samples cannot give an image
rejection of IQ_MIN_CORRECTED_IRR_DB after correction (10 log10(2 N) below it), when a channel has no
power in I or Q, or when more than 1 / sqrt(N) of a channel's samples are clipped (clipping of I and Q
at the same full scale is not circular once g != 1: its bias may then exceed the statistical error).
Warnings: any clipping; a DC level that changes from chirp to chirp (left after the loop mean: its
power can bias sin phi by up to its share of the power, warned when that exceeds sd(phi)); an
estimated imbalance so large (IRR below IQ_FAULT_IRR_DB) that a wiring or configuration fault is more
likely than imbalance.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Iterable

import numpy as np

from .errors import CubecastError
from .sensor import Sensor

IQ_MIN_CORRECTED_IRR_DB = 50.0  # the estimate's own error must leave the image this far down (N >= 50000)
IQ_FAULT_IRR_DB = 10.0  # an uncorrected IRR below this is a fault (a swapped, dead or mis-scaled branch)
DC_EXCESS_SIGMAS = 5.0  # the chirp-to-chirp DC share must exceed what noise gives by this many sd to count

IQ_METHOD = ("blind: second moments of the samples left after removing each slot's mean over its loops "
             "(DC, leakage and static echoes), g = sqrt(S_QQ / S_II), sin phi = -S_IQ / sqrt(S_II S_QQ); "
             "valid for a circular signal (receiver noise, moving echoes over many cycles)")


def image_rejection_db(g, phi_rad):
    """IRR = (1 + 2 g cos phi + g^2) / (1 - 2 g cos phi + g^2) in dB (Razavi 2011; common practice)."""
    g, phi = np.asarray(g, np.float64), np.asarray(phi_rad, np.float64)
    c = 2.0 * g * np.cos(phi)
    return 10.0 * np.log10((1.0 + c + g * g) / np.maximum(1.0 - c + g * g, 1e-300))


def correct_iq(frame: np.ndarray, table: np.ndarray | None) -> np.ndarray:
    """The correction applied to a canonical frame [chirp, rx, sample] (a new array, the frame's dtype):
    I = I', Q = (Q' / g + I' sin phi) / cos phi per RX, `table` float64 [n_rx, 2] = (g, phi rad)."""
    if table is None:
        return frame
    g = table[:, 0][None, :, None]
    phi = table[:, 1][None, :, None]
    i_part = frame.real.astype(np.float64)
    q_part = (frame.imag / g + i_part * np.sin(phi)) / np.cos(phi)
    return (i_part + 1j * q_part).astype(frame.dtype)


def check_iq_table(table, n_rx: int, what: str) -> np.ndarray:
    """A table of (g, phi rad) per RX, validated: float64 [n_rx, 2]; CubecastError naming `what`."""
    a = np.asarray(table, np.float64)
    if a.shape != (n_rx, 2):
        raise CubecastError(f"{what}: shape {a.shape}; must be [{n_rx}, 2] (g, phi_rad) per receive channel")
    for rx, (g, phi) in enumerate(a):
        if not (math.isfinite(g) and g > 0):
            raise CubecastError(f"{what}: rx {rx} gain {g!r}: must be a finite number greater than zero")
        if not (math.isfinite(phi) and abs(phi) < math.pi / 2):
            raise CubecastError(f"{what}: rx {rx} phase {phi!r} rad: must be finite and within -90..90 deg "
                                "(exclusive)")
    return a


@dataclass
class IqResult:
    """What estimate_iq_imbalance measured, per receive channel."""

    gain: np.ndarray  # float64 [n_rx]: g, the Q branch's gain relative to I
    phase_rad: np.ndarray  # float64 [n_rx]: phi
    gain_sd: np.ndarray  # float64 [n_rx]: g cos phi / sqrt(N)
    phase_sd_rad: np.ndarray  # float64 [n_rx]: cos phi / sqrt(N)
    image_rejection_db: np.ndarray  # float64 [n_rx]: the IRR of the estimated imbalance (uncorrected)
    samples: int  # N: degrees of freedom per RX
    corrected_irr_db: float  # 10 log10(2 N): expected image rejection after correction
    dc_offset_counts: np.ndarray  # float64 [n_rx]: |complex mean| of each channel, averaged over frames
    clipped: np.ndarray  # int64 [n_rx]: samples with I or Q at or beyond full scale
    frames: int
    warnings: list[str] = field(default_factory=list)
    refusals: list[str] = field(default_factory=list)

    @property
    def table(self) -> np.ndarray | None:
        """float64 [n_rx, 2] = (g, phi rad), the Pipeline's iq_imbalance; None when refused."""
        if self.refusals:
            return None
        return np.column_stack([self.gain, self.phase_rad])

    @property
    def gain_db(self) -> np.ndarray:
        return 20.0 * np.log10(self.gain)


class IqMoments:
    """Running sums over frames (canonical complex64 [chirp, rx, sample]) for the blind estimate."""

    def __init__(self, sensor: Sensor):
        self.sensor = sensor
        n_rx = sensor.n_rx
        self.s_ii = np.zeros(n_rx)
        self.s_qq = np.zeros(n_rx)
        self.s_iq = np.zeros(n_rx)
        self.chirp_dc = np.zeros(n_rx)  # sum over chirps of N |fast-time mean of the residual|^2
        self.dc_sum = np.zeros(n_rx)
        self.clipped = np.zeros(n_rx, np.int64)
        self.frames = 0

    def add(self, frame: np.ndarray) -> None:
        s = self.sensor
        n_loops, n_slots, n_rx, n_samp = s.n_loops, s.n_slots, s.n_rx, s.samples_per_chirp
        fs = s.adc.full_scale
        self.clipped += np.count_nonzero((np.abs(frame.real) >= fs) | (np.abs(frame.imag) >= fs), axis=(0, 2))
        x = frame.reshape(n_loops, n_slots, n_rx, n_samp).astype(np.complex128)
        self.dc_sum += np.abs(x.mean(axis=(0, 1, 3)))
        e = x - x.mean(axis=0, keepdims=True)
        i_part, q_part = e.real, e.imag
        self.s_ii += np.einsum("lsrn,lsrn->r", i_part, i_part)
        self.s_qq += np.einsum("lsrn,lsrn->r", q_part, q_part)
        self.s_iq += np.einsum("lsrn,lsrn->r", i_part, q_part)
        self.chirp_dc += n_samp * (np.abs(e.mean(axis=3)) ** 2).sum(axis=(0, 1))
        self.frames += 1

    @property
    def samples(self) -> int:
        s = self.sensor
        return self.frames * s.n_slots * s.samples_per_chirp * max(s.n_loops - 1, 0)

    def result(self) -> IqResult:
        """The estimate, its standard deviations and the checks (module docstring)."""
        s = self.sensor
        n_rx, n = s.n_rx, self.samples
        refusals = _structural_refusals(s, self.frames, n)
        with np.errstate(divide="ignore", invalid="ignore"):
            gain = np.sqrt(self.s_qq / self.s_ii)
            sin_phi = -self.s_iq / np.sqrt(self.s_ii * self.s_qq)
        phase = np.arcsin(np.clip(np.nan_to_num(sin_phi), -1.0, 1.0))
        for rx in range(n_rx):
            if not refusals and not (self.s_ii[rx] > 0 and self.s_qq[rx] > 0):
                refusals.append(f"rx {rx}: no power in its {'I' if not self.s_ii[rx] > 0 else 'Q'} samples once "
                                "each slot's mean over its loops is removed: a dead branch, or a capture without "
                                "receiver noise")
        if refusals:
            gain = np.where(np.isfinite(gain), gain, 1.0)
        cos_phi = np.cos(phase)
        root_n = math.sqrt(max(n, 1))
        res = IqResult(
            gain=gain, phase_rad=phase, gain_sd=gain * cos_phi / root_n, phase_sd_rad=cos_phi / root_n,
            image_rejection_db=image_rejection_db(gain, phase), samples=n,
            corrected_irr_db=10.0 * math.log10(2.0 * n) if n > 0 else -math.inf,
            dc_offset_counts=self.dc_sum / max(self.frames, 1), clipped=self.clipped.copy(), frames=self.frames,
            refusals=refusals)
        if not refusals and n_rx:
            _sample_checks(self, res)
        return res


def _structural_refusals(s: Sensor, frames: int, n: int) -> list[str]:
    """What makes the capture unusable whatever its samples hold."""
    if not s.adc.is_complex:
        return ["the ADC samples real values ([adc] sampling = \"real\"): there is no Q branch, so no I/Q "
                "imbalance to estimate or correct"]
    if s.n_loops < 2:
        return [f"sensor '{s.sensor_id}' has {s.n_loops} loop per frame: the estimate removes each slot's mean "
                "over its loops (DC, leakage and static echoes) and needs at least 2"]
    if frames == 0:
        return ["the capture has no readable frames"]
    corrected = 10.0 * math.log10(2.0 * n)
    if corrected < IQ_MIN_CORRECTED_IRR_DB:
        need = math.ceil(10.0 ** (IQ_MIN_CORRECTED_IRR_DB / 10.0) / 2.0 / (n / frames))
        return [f"too few samples: {n} per channel (frames x slots x samples x (loops - 1)) give an image "
                f"rejection of only {corrected:.1f} dB after correction (10 log10(2 N); the rule is at least "
                f"{IQ_MIN_CORRECTED_IRR_DB:g} dB): record at least {need} frames"]
    return []


def _sample_checks(m: IqMoments, res: IqResult) -> None:
    """Clipping, chirp-to-chirp DC and fault-sized imbalance (module docstring), into res."""
    s = m.sensor
    n = res.samples
    per_rx = m.frames * s.chirps_per_frame * s.samples_per_chirp
    limit = 1.0 / math.sqrt(n)
    for rx in range(s.n_rx):
        share = m.clipped[rx] / per_rx
        if share > limit:
            res.refusals.append(
                f"rx {rx}: {100.0 * share:.3g} % of its samples clipped (at or beyond full scale "
                f"{s.adc.full_scale:g}), more than 1 / sqrt(N) = {100.0 * limit:.3g} %: clipping biases the "
                "estimate more than its statistical error; record with less receiver gain or without the "
                "strong near reflector")
        elif m.clipped[rx]:
            res.warnings.append(f"rx {rx}: {m.clipped[rx]} samples clipped ({100.0 * share:.3g} %); the I/Q "
                                "estimate assumes none")
    total = m.s_ii + m.s_qq
    k_chirps = m.frames * s.chirps_per_frame
    noise_share = 1.0 / s.samples_per_chirp  # white noise: each chirp's mean holds 1 / samples of its power
    noise_sd = noise_share / math.sqrt(k_chirps * (1.0 - 1.0 / s.n_loops))
    for rx in range(s.n_rx):
        excess = m.chirp_dc[rx] / total[rx] - noise_share
        if excess > DC_EXCESS_SIGMAS * noise_sd and excess > res.phase_sd_rad[rx]:
            res.warnings.append(
                f"rx {rx}: a DC level that changes from chirp to chirp holds {100.0 * excess:.3g} % of the power "
                f"left after removing the static part; it can bias the phase estimate by up to "
                f"{math.degrees(excess):.3g} deg, more than its statistical error "
                f"{math.degrees(res.phase_sd_rad[rx]):.3g} deg (a drifting offset or leakage?)")
    for rx in np.flatnonzero(res.image_rejection_db < IQ_FAULT_IRR_DB):
        res.warnings.append(
            f"rx {rx}: estimated Q gain {res.gain_db[rx]:+.2f} dB, phase {math.degrees(res.phase_rad[rx]):+.2f} deg "
            f"(image rejection {res.image_rejection_db[rx]:.1f} dB, below {IQ_FAULT_IRR_DB:g} dB): more likely a "
            "dead, swapped or mis-scaled I or Q line than imbalance; check the wiring and the [adc] section")


def estimate_iq_imbalance(sensor: Sensor, frames: Iterable[np.ndarray]) -> IqResult:
    """The blind estimate over canonical frames (complex64 [chirp, rx, sample]); pure, no I/O. A capture
    that cannot give one is not an error here: the result says why in `refusals`."""
    m = IqMoments(sensor)
    if sensor.adc.is_complex and sensor.n_loops >= 2:
        for frame in frames:
            m.add(frame)
    return m.result()


def format_iq_report(res: IqResult) -> list[str]:
    """Lines of the terminal report."""
    out = [f"I/Q           {res.samples} samples per channel over {res.frames} frames; expected image rejection "
           f"after correction {res.corrected_irr_db:.1f} dB (10 log10(2 N))"]
    if res.refusals:
        out.append("I/Q           not estimated: " + "; ".join(res.refusals))
        return out
    out.append("rx   Q gain dB      sd dB   phase deg     sd deg   IRR dB   DC counts")
    for rx in range(len(res.gain)):
        sd_db = 20.0 / math.log(10.0) * res.gain_sd[rx] / res.gain[rx]
        out.append(f"{rx:2d}  {res.gain_db[rx]:+10.4f} {sd_db:10.4f}  {math.degrees(res.phase_rad[rx]):+10.4f} "
                   f"{math.degrees(res.phase_sd_rad[rx]):10.4f}  {res.image_rejection_db[rx]:7.1f}  "
                   f"{res.dc_offset_counts[rx]:10.2f}")
    return out
