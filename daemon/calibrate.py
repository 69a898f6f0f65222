"""Array calibration from a capture of one corner reflector at a known place (`cubecast calibrate`).

Each virtual channel v = k * n_rx + l (TX k, RX l) of a real front end carries its own complex gain
g_v (feed lines, amplifiers, phase shifters, couplings). The angle estimator assumes equal gains, so
unequal ones bias the angles and raise the sidelobes. With one static point reflector at a known
place the gains can be measured:

1. Every frame runs through the chain's front end (Pipeline: range FFT, Doppler FFT; Hann windows,
   removal of static returns off, or the reflector would be removed). The reflector's cell is the
   strongest zero-Doppler cell within `search_cells` range cells of the given range.
2. The cell's slot values are decoded into the virtual snapshot z_f[v] of frame f (MIMO decoding;
   the reflector is static, so no Doppler phase compensation is involved).
3. The ideal snapshot a[v] is computed from the signal model with the exact geometry: round-trip
   delay tau_v = (|p - tx_k| + |p - rx_l|) / c (no far-field approximation), the same chirp phase
   f_0 tau - S tau^2 / 2 + S tau t_n as the simulator, and the same range window and FFT bin.
4. Per frame the ratio r_f[v] = z_f[v] / a[v] is rotated by its common phase (the phase of
   sum_v r_f[v]: frame-to-frame phase drift of the oscillator is common to all channels), then
   averaged coherently over frames per channel.
5. The mean ratio is normalised to unit mean amplitude over channels and to zero phase on
   channel 0: that is the channel gain g_v. The calibration vector is its inverse, 1 / g_v,
   multiplied onto each channel before angle estimation.

Range bias: the reflector's range measured with a fine (16x zero-padded) range spectrum of the
loop-averaged fast-time samples, minus the given range. The chain subtracts it from every range.

Checks: see calibchecks.py. Refusals (nothing written without --force): no reflector at the given
place, or one too weak for gain phases to PHASE_ACCURACY_DEG (1 deg rms: an integrated per-channel SNR
of 32.2 dB); each says what would make the capture usable. Warnings: too near, not alone, not static,
clipping, a channel far from the others.

I/Q imbalance (calibiq.py): unless --no-iq, a first pass over the capture estimates each receive
channel's Q-branch gain and phase error blind, from the second moments of what is left once each
slot's mean over its loops (DC, leakage, the reflector itself) is removed. The array pass then runs on
frames with that imbalance corrected, as the chain will correct them: an uncorrected imbalance scales
every echo of an RX by mu = (1 + g e^{-j phi}) / 2, which would otherwise end up in the channel gains.
`--iq-only` estimates the I/Q imbalance alone, from any capture (no reflector needed).

The calibration file is TOML in our own layout (see README "Calibration file"), written and read
back in calibfile.py (its names are also importable from here); `load_calibration` gives the
complex64 vector the Pipeline takes, checking that the file was made for the sensor.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

import numpy as np

from .calibchecks import (CHANNEL_GAIN_LIMIT_DB, MIN_INTEGRATED_SNR_DB, MISFIT_LIMIT_DB, NEAR_RANGE_CELLS,
                          NEIGHBOUR_CELLS, NEIGHBOUR_LEVEL_DB, PHASE_ACCURACY_DEG, SECOND_ANGLE_PEAK_DB,
                          ReflectorEvidence, azimuth_beams, cell_snr, channel_gain_warnings, clipping_warnings, db,
                          near_limit, neighbour_misfit, not_static_warnings, other_peak_warnings,
                          reflector_refusals, zero_doppler_echoes)
from .calibfile import (CALIBRATION_FORMAT, CALIBRATION_VERSION, RANGE_BIAS_NOTE, CalibrationFile, format_calibration,
                        load_calibration, load_calibration_file, write_calibration, write_iq_calibration)
from .calibiq import IqResult, correct_iq, estimate_iq_imbalance, format_iq_report
from .errors import CubecastError
from .scene import polar_to_cartesian
from .sensor import SPEED_OF_LIGHT_MPS, Sensor
from .settings import ProcessingSettings

__all__ = [
    "CALIBRATION_FORMAT",
    "CALIBRATION_VERSION",
    "MIN_INTEGRATED_SNR_DB",
    "PHASE_ACCURACY_DEG",
    "NEAR_RANGE_CELLS",
    "NEIGHBOUR_CELLS",
    "NEIGHBOUR_LEVEL_DB",
    "MISFIT_LIMIT_DB",
    "SECOND_ANGLE_PEAK_DB",
    "CHANNEL_GAIN_LIMIT_DB",
    "CalibrationResult",
    "CalibrationFile",
    "calibration_settings",
    "ideal_snapshot",
    "estimate_calibration",
    "calibrate_capture",
    "format_calibration",
    "write_calibration",
    "format_report",
    "load_calibration_file",
    "load_calibration",
    "add_parser",
    "run",
]

DEFAULT_SEARCH_CELLS = 4
FINE_RANGE_PADDING = 16  # zero padding of the fine range spectrum for the range bias

log = logging.getLogger(__name__)


def calibration_settings(base: ProcessingSettings | None = None) -> ProcessingSettings:
    """The front-end settings calibration uses: Hann range and Doppler windows (sidelobes below
    -31 dB, Harris 1978, so the neighbour check sees real peaks only), no zero padding, and static
    removal of static returns off (it would remove the reflector)."""
    base = base or ProcessingSettings()
    return dataclasses.replace(base, range_window="hann", doppler_window="hann", range_fft_size=0,
                               doppler_fft_size=0, remove_static=False).validate()


# ---- the model --------------------------------------------------------------------------------

def ideal_snapshot(sensor: Sensor, position_m: np.ndarray, range_bins, window: np.ndarray,
                   fft_size: int) -> np.ndarray:
    """Noise-free range-FFT value of a unit point reflector at `position_m` for every virtual
    channel, at each of `range_bins`: complex128 [len(range_bins), n_virtual].

    Exact geometry as in the signal model: tau = (|p - tx_k| + |p - rx_l|) / c, fast-time phase
    f_0 tau - S tau^2 / 2 + S tau t_n, the range window and a DFT of `fft_size` points."""
    p = np.asarray(position_m, np.float64)
    d_tx = np.linalg.norm(p[None, :] - sensor.tx_positions_m, axis=1)  # [K]
    d_rx = np.linalg.norm(p[None, :] - sensor.rx_positions_m, axis=1)  # [L]
    tau = ((d_tx[:, None] + d_rx[None, :]) / SPEED_OF_LIGHT_MPS).reshape(-1)  # [V], v = k * n_rx + l
    n = np.arange(sensor.samples_per_chirp)
    t_n = sensor.adc_start_delay_s + n / sensor.sample_rate_hz
    sen = sensor  # (short alias)
    f0, slope = sen.start_frequency_hz, sen.slope_hz_per_s
    cyc0 = np.mod(f0 * tau - 0.5 * slope * tau * tau, 1.0)
    cyc = cyc0[:, None] + (slope * tau)[:, None] * t_n[None, :]  # [V, N]
    x = np.exp(2j * np.pi * cyc) * np.asarray(window, np.float64)[None, :]
    bins = np.atleast_1d(np.asarray(range_bins, np.float64))
    kernel = np.exp(-2j * np.pi * bins[:, None] * n[None, :] / fft_size)  # [B, N]
    return kernel @ x.T  # [B, V]


# ---- result -----------------------------------------------------------------------------------

@dataclass
class CalibrationResult:
    """Everything `estimate_calibration` measured. Arrays are per virtual channel v = k * n_rx + l."""

    sensor: Sensor
    gain: np.ndarray  # complex128 [V]: measured gain, unit mean amplitude, channel 0 at phase 0
    vector: np.ndarray  # complex64 [V]: the calibration, 1 / gain
    target_range_m: float
    azimuth_deg: float
    elevation_deg: float
    target_position_m: np.ndarray
    measured_range_m: float
    range_bias_m: float
    range_rms_m: float  # frame-to-frame scatter of the fine range estimate
    range_bin: int
    frames_used: int
    cell_snr_db: float  # per channel, per frame, in the reflector's range-Doppler cell
    integrated_snr_db: float  # cell_snr_db + 10 log10(frames)
    predicted_phase_deg: float  # 1 / sqrt(2 x integrated SNR): expected error of the gain phases
    frame_phase_deg: float  # 1 / sqrt(2 x cell SNR): expected frame-to-frame phase scatter
    residual_phase_deg: np.ndarray  # [V] rms frame-to-frame deviation from the mean (after common phase)
    residual_amplitude_db: np.ndarray  # [V] rms frame-to-frame amplitude deviation
    neighbour_misfit_db: float  # worst of the two calibrated range cells beside the reflector
    expected_misfit_db: float  # what noise alone gives there
    azimuth_uncalibrated_deg: float  # the chain's estimate without / with the calibration (frame mean)
    elevation_uncalibrated_deg: float
    azimuth_calibrated_deg: float
    elevation_calibrated_deg: float
    azimuth_calibrated_std_deg: float
    psl_uncalibrated_db: float  # azimuth beam of the mean snapshot: strongest peak outside the main lobe
    psl_calibrated_db: float
    far_field_m: float  # 2 D^2 / lambda
    near_limit_m: float  # max(far field, NEAR_RANGE_CELLS x range resolution)
    clipped_samples: int
    warnings: list[str] = field(default_factory=list)
    refusals: list[str] = field(default_factory=list)  # why it is no usable calibration (written only by force)
    capture: str = ""
    iq: IqResult | None = None  # the I/Q imbalance estimate the array pass corrected (None: not estimated)

    @property
    def gain_db(self) -> np.ndarray:
        return 20.0 * np.log10(np.abs(self.gain))

    @property
    def gain_phase_deg(self) -> np.ndarray:
        return np.degrees(np.angle(self.gain))


# ---- estimation -------------------------------------------------------------------------------

def _check_number(name: str, value, low: float | None = None, high: float | None = None,
                  positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not math.isfinite(value):
        raise CubecastError(f"{name} {value!r}: must be a finite number")
    value = float(value)
    if positive and value <= 0:
        raise CubecastError(f"{name} {value:g}: must be greater than zero")
    if low is not None and high is not None and not low <= value <= high:
        raise CubecastError(f"{name} {value:g}: must be within {low:g}..{high:g}")
    return value


def _check_target(target_range_m: float, azimuth_deg: float, elevation_deg: float,
                  search_cells: int) -> tuple[float, float, float]:
    """The given place of the reflector (range, azimuth, elevation), checked."""
    r0 = _check_number("--target-range-m", target_range_m, positive=True)
    az0 = _check_number("--azimuth-deg", azimuth_deg, -90.0, 90.0)
    el0 = _check_number("--elevation-deg", elevation_deg, -90.0, 90.0)
    if isinstance(search_cells, bool) or not isinstance(search_cells, (int, np.integer)) or search_cells < 1:
        raise CubecastError(f"--search-cells {search_cells!r}: must be a whole number of at least 1")
    return r0, az0, el0


def _search_window(sensor: Sensor, r0: float, search_cells: int, bin_m: float, n_range: int) -> tuple[int, int]:
    """The range cells lo..hi (inclusive) searched for the reflector: `search_cells` either side of
    the given range, keeping one cell spare at each end of the spectrum."""
    expected_bin = r0 / bin_m
    lo = max(1, int(math.floor(expected_bin - search_cells)))
    hi = min(n_range - 2, int(math.ceil(expected_bin + search_cells)))
    if expected_bin > n_range - 2 or lo > hi:
        raise CubecastError(f"--target-range-m {r0:g}: beyond the sensor's maximum range "
                            f"{sensor.max_range_m:.2f} m")
    return lo, hi


def _noise_cells(sensor: Sensor, n_range: int, n_dop: int, c0: int, lo: int, hi: int) -> np.ndarray:
    """Mask [range, Doppler] of the cells that measure the noise: cells well away from zero Doppler
    (where every static echo sits); with too few Doppler bins for that, the range cells away from
    the search window."""
    noise_mask = np.zeros((n_range, n_dop), bool)
    noise_mask[:, np.abs(np.arange(n_dop) - c0) >= max(3, n_dop // 8)] = True
    if not noise_mask.any():
        noise_mask[:max(0, lo - NEIGHBOUR_CELLS)] = True
        noise_mask[hi + NEIGHBOUR_CELLS + 1:] = True
    if not noise_mask.any():
        raise CubecastError(f"sensor '{sensor.sensor_id}': too few range and Doppler cells to measure the noise")
    return noise_mask


@dataclass
class _FrontEndSums:
    """What the chain's front end gave over the frames (_run_front_end)."""

    cells: np.ndarray  # complex128 [F, rx, slot, hi - lo + 3]: zero-Doppler slot values, search window +- 1 cell
    loop_means: np.ndarray  # complex128 [F, slot, rx, N]: the loop average of the fast-time samples
    mean_map: np.ndarray  # float64 [range, Doppler]: the detection map averaged over the frames
    noise: list[float]  # per frame: median of the detection map over the noise cells
    clipped: int  # ADC samples at full scale, all frames
    n_frames: int


def _run_front_end(pipe, sensor: Sensor, frames: Iterable[np.ndarray], lo: int, hi: int,
                   noise_mask: np.ndarray, iq_imbalance: np.ndarray | None = None) -> _FrontEndSums:
    """Every frame through the front end (range and Doppler FFTs), its I/Q imbalance corrected first;
    keeps what the estimation needs."""
    dop = pipe.doppler_fft
    n_loops, n_slots, n_rx, n_samp = sensor.n_loops, sensor.n_slots, sensor.n_rx, sensor.samples_per_chirp
    full_scale = sensor.adc.full_scale
    cells, loop_means, noise, maps = [], [], [], None
    clipped = 0
    for raw in frames:
        frame = correct_iq(raw, iq_imbalance)
        pipe.process(frame)
        # zero-Doppler slot values over the search window and one cell either side: [rx, slot, bins]
        cells.append(dop.spectrum[:, :, lo - 1: hi + 2, 0].astype(np.complex128))
        dmap = pipe.detection_map
        maps = dmap.astype(np.float64) if maps is None else maps + dmap
        noise.append(float(np.median(dmap[noise_mask])))
        # static reflector: the loop average of each (slot, rx) keeps it and cuts the noise n_loops times
        loop_means.append(frame.reshape(n_loops, n_slots, n_rx, n_samp).mean(axis=0, dtype=np.complex128))
        clipped += int(np.count_nonzero((np.abs(raw.real) >= full_scale)
                                        | (np.abs(raw.imag) >= full_scale)))
    n_frames = len(cells)
    if n_frames == 0:
        raise CubecastError("calibration needs at least one frame; the capture has no readable frames")
    return _FrontEndSums(np.stack(cells), np.stack(loop_means), maps / n_frames, noise, clipped, n_frames)


def _find_reflector(zero_col: np.ndarray, lo: int, hi: int) -> tuple[int, bool]:
    """The reflector's range cell: the strongest zero-Doppler cell of the search window, and whether it
    is a local maximum of the zero-Doppler column `zero_col` (not the slope of something outside)."""
    rb = lo + int(np.argmax(zero_col[lo: hi + 1]))
    return rb, bool(zero_col[rb] > zero_col[rb - 1] and zero_col[rb] >= zero_col[rb + 1])


def _unit_cell_snr(pipe, sensor: Sensor, position_m: np.ndarray, range_bin: int) -> float:
    """Per-channel SNR in the range-Doppler cell of a static 0 dBsm point reflector at `position_m`, by
    the sensor description's link budget: the per-sample SNR of the radar range equation (simulate.py),
    times the coherent gain of the range window at that cell, |sum_n w_n e^..|^2 / sum_n w_n^2, and of
    the Doppler window at zero Doppler, (sum w)^2 / sum w^2 (Harris 1978), times the MIMO decoding's SNR
    factor (1 for TDM)."""
    from .simulate import range_equation_snr_db
    rng_fft, dop = pipe.range_fft, pipe.doppler_fft
    a = ideal_snapshot(sensor, position_m, [range_bin], rng_fft.window, rng_fft.fft_size)[0]
    w_r, w_d = rng_fft.window.astype(np.float64), dop.window.astype(np.float64)
    gain = float(np.mean(np.abs(a) ** 2)) / float(np.sum(w_r ** 2)) * float(w_d.sum() ** 2 / np.sum(w_d ** 2))
    per_sample = 10.0 ** (float(range_equation_snr_db(sensor, float(np.linalg.norm(position_m)), 0.0)) / 10.0)
    return per_sample * gain * pipe.mimo.virtual_snr_factor()


def _noise_power(pipe, noise: list[float], n_rx: int) -> tuple[float, np.ndarray]:
    """(one channel's noise power in the detection map, the noise power of each virtual channel
    after MIMO decoding [V], v = k * n_rx + l)."""
    # the map is a sum of K exponential noise powers: its median is about K - 1/3 times one
    # channel's noise power (median of a Gamma(K) variable; from memory, common practice)
    sigma2_c = float(np.mean(noise)) / (pipe.doppler_fft.n_channels - 1.0 / 3.0)
    decode = pipe.mimo.decode  # [tx, slot]
    sigma2_v = np.repeat(sigma2_c * (np.abs(decode) ** 2).sum(axis=1), n_rx)
    return sigma2_c, sigma2_v


def _virtual_snapshots(pipe, cells: np.ndarray, jj: int) -> np.ndarray:
    """The frames' virtual snapshots of stored range cell `jj`: complex128 [F, V], each frame's slot
    values [rx, slot] decoded at zero Doppler (the reflector is static)."""
    n_frames = cells.shape[0]
    values = np.ascontiguousarray(cells[:, :, :, jj], np.complex64)   # [frame, rx, slot]
    return pipe.mimo.snapshots(values, np.zeros((n_frames, 1)))[:, 0, :].astype(np.complex128)


@dataclass
class _Gains:
    """The channel gains measured from the snapshots (_channel_gains)."""

    gain: np.ndarray  # complex128 [V]: unit mean amplitude, channel 0 at phase 0
    common: np.ndarray  # complex128 [F]: each frame's common phase rotation
    ratio: np.ndarray  # complex128 [F, V]: measured over ideal snapshot, common phase removed
    mean_ratio: np.ndarray  # complex128 [V]: its coherent mean over the frames


def _channel_gains(z: np.ndarray, ideal_cell: np.ndarray) -> _Gains:
    """Steps 4 and 5 of the method (module docstring): the ratios measured / ideal, rotated by each
    frame's common phase, averaged over frames, normalised to unit mean amplitude and to zero phase
    on channel 0."""
    ratio = z / ideal_cell[None, :]
    common = np.exp(-1j * np.angle(ratio.sum(axis=1)))  # [F] common phase per frame
    ratio *= common[:, None]
    mean_ratio = ratio.mean(axis=0)
    amp = np.abs(mean_ratio)
    if np.any(amp <= 0) or not np.all(np.isfinite(mean_ratio)):
        raise CubecastError("calibration failed: a virtual channel has no signal from the reflector")
    gain = mean_ratio / amp.mean() * np.exp(-1j * np.angle(mean_ratio[0]))
    return _Gains(gain, common, ratio, mean_ratio)


def _frame_residuals(g: _Gains, n_virtual: int) -> tuple[np.ndarray, np.ndarray]:
    """Per channel, the rms frame-to-frame deviation from the mean ratio: (phase in degrees,
    amplitude in dB); NaN with a single frame."""
    if g.ratio.shape[0] > 1:
        dev = g.ratio / g.mean_ratio[None, :]
        residual_phase_deg = np.degrees(np.sqrt(np.mean(np.angle(dev) ** 2, axis=0)))
        residual_amplitude_db = np.sqrt(np.mean((20.0 * np.log10(np.abs(dev))) ** 2, axis=0))
        return residual_phase_deg, residual_amplitude_db
    return np.full(n_virtual, np.nan), np.full(n_virtual, np.nan)


def _fine_range(loop_means: np.ndarray, window: np.ndarray, fft_size: int, rb: int,
                bin_m: float) -> tuple[float, float]:
    """The reflector's range from a FINE_RANGE_PADDING x zero-padded range spectrum of the loop
    averages [F, slot, rx, N], power summed over channels: (over all frames, rms over frames; NaN with
    one frame)."""
    n_fine = FINE_RANGE_PADDING * fft_size
    spec = np.fft.fft(loop_means * window.astype(np.float64), n=n_fine, axis=-1)
    kc = rb * FINE_RANGE_PADDING
    ka, kb = kc - 2 * FINE_RANGE_PADDING, kc + 2 * FINE_RANGE_PADDING + 1
    pw = (np.abs(spec[..., ka:kb]) ** 2).sum(axis=(1, 2))  # [F, window]

    from .chain.pipeline import log_parabola_offset   # the chain's own interpolation (numba: load on use)

    def peak_m(p: np.ndarray) -> float:
        i = int(np.argmax(p[1:-1])) + 1
        return (ka + i + float(log_parabola_offset(p[i - 1], p[i], p[i + 1]))) / FINE_RANGE_PADDING * bin_m

    measured_range_m = peak_m(pw.sum(axis=0))
    per_frame = np.array([peak_m(p) for p in pw])
    n_frames = loop_means.shape[0]
    range_rms_m = float(np.sqrt(np.mean((per_frame - per_frame.mean()) ** 2))) if n_frames > 1 else math.nan
    return measured_range_m, range_rms_m


def estimate_calibration(sensor: Sensor, frames: Iterable[np.ndarray], target_range_m: float,
                         azimuth_deg: float = 0.0, elevation_deg: float = 0.0, *,
                         search_cells: int = DEFAULT_SEARCH_CELLS,
                         iq_imbalance: np.ndarray | None = None) -> CalibrationResult:
    """Measure the virtual channels' gains and the range bias from canonical frames (complex64
    [chirp, rx, sample]) of a static point reflector at (target_range_m, azimuth_deg,
    elevation_deg), each frame's I/Q imbalance `iq_imbalance` ([n_rx, 2] = (g, phi rad), or None)
    corrected first. Pure: no I/O. A capture that cannot give a usable calibration (no reflector, too weak)
    is not an error here: the result says why in `refusals` (write_calibration refuses it unless forced).
    The steps and checks are those of the module docstring, in that order."""
    from .chain.bounds import tone_phase_crb_rad
    from .chain.pipeline import Pipeline  # the chain imports numba kernels: load on use

    r0, az0, el0 = _check_target(target_range_m, azimuth_deg, elevation_deg, search_cells)
    settings = calibration_settings()
    pipe = Pipeline(sensor, settings)
    rng_fft, dop = pipe.range_fft, pipe.doppler_fft
    bin_m, n_range, n_dop = rng_fft.bin_m, rng_fft.n_bins, dop.fft_size
    lo, hi = _search_window(sensor, r0, search_cells, bin_m, n_range)
    c0 = n_dop // 2  # zero Doppler in the (shifted) detection map; column 0 of the spectrum
    sums = _run_front_end(pipe, sensor, frames, lo, hi, _noise_cells(sensor, n_range, n_dop, c0, lo, hi),
                          iq_imbalance)
    n_frames, mean_map = sums.n_frames, sums.mean_map
    rb, is_peak = _find_reflector(mean_map[:, c0], lo, hi)
    j = rb - lo + 1  # index of the reflector's bin in the stored window

    sigma2_c, sigma2_v = _noise_power(pipe, sums.noise, sensor.n_rx)
    z = _virtual_snapshots(pipe, sums.cells, j)  # [F, V]
    rho = cell_snr(z, sigma2_v)
    cell_snr_db = db(rho)
    integrated_snr_db = cell_snr_db + 10.0 * math.log10(n_frames)
    predicted_phase_deg = math.degrees(tone_phase_crb_rad(rho, n_frames))
    pos_t = polar_to_cartesian(r0, az0, el0)
    column_level = mean_map[:, c0] / (dop.n_channels * sigma2_c)  # per-channel level over the noise
    far_field_m, near_limit_m, near = near_limit(sensor, r0)
    refusals = reflector_refusals(ReflectorEvidence(
        level=float(np.mean(np.abs(z) ** 2 / sigma2_v[None, :])), n_frames=n_frames, n_virtual=sensor.n_virtual,
        n_cells=hi - lo + 1, is_peak=is_peak, range_m=rb * bin_m, target_range_m=r0, azimuth_deg=az0,
        elevation_deg=el0, search_m=search_cells * bin_m,
        unit_cell_snr=_unit_cell_snr(pipe, sensor, pos_t, int(round(r0 / bin_m))), wavelength_m=sensor.wavelength_m,
        others=zero_doppler_echoes(column_level, n_frames, (lo, hi), int(math.ceil(near_limit_m / bin_m)), bin_m)))
    warnings = near
    warnings += other_peak_warnings(mean_map, rb, c0, dop.n_channels * sigma2_c, bin_m,
                                     dop.bin_hz * sensor.wavelength_m / 2.0)
    warnings += not_static_warnings(mean_map[rb], c0, rb * bin_m)

    ideal = ideal_snapshot(sensor, pos_t, [rb - 1, rb, rb + 1], rng_fft.window, rng_fft.fft_size)  # [3, V]
    g = _channel_gains(z, ideal[1])
    vector = (1.0 / g.gain).astype(np.complex64)
    warnings += channel_gain_warnings(g.gain, sensor.n_rx)
    residual_phase_deg, residual_amplitude_db = _frame_residuals(g, sensor.n_virtual)
    beside = (_virtual_snapshots(pipe, sums.cells, j - 1), _virtual_snapshots(pipe, sums.cells, j + 1))
    neighbour_misfit_db, expected_misfit_db, misfit = neighbour_misfit(beside, g.common, g.gain, ideal, sigma2_v)
    warnings += misfit
    z_mean = (z * g.common[:, None]).mean(axis=0)
    psl_unc, psl_cal, second = azimuth_beams(sensor, ideal[1], z_mean, g.gain, az0, el0)
    warnings += second

    # the chain's own angle estimate, without and with the calibration
    az_u, el_u = _chain_angles(pipe.angle, z)
    az_c, el_c = _chain_angles(Pipeline(sensor, settings, vector).angle, z)
    measured_range_m, range_rms_m = _fine_range(sums.loop_means, rng_fft.window, rng_fft.fft_size, rb, bin_m)
    warnings += clipping_warnings(sums.clipped, sensor.adc.full_scale)

    return CalibrationResult(
        sensor=sensor, gain=g.gain, vector=vector, target_range_m=r0, azimuth_deg=az0, elevation_deg=el0,
        target_position_m=pos_t, measured_range_m=measured_range_m, range_bias_m=measured_range_m - r0,
        range_rms_m=range_rms_m, range_bin=rb, frames_used=n_frames, cell_snr_db=cell_snr_db,
        integrated_snr_db=integrated_snr_db, predicted_phase_deg=predicted_phase_deg,
        frame_phase_deg=math.degrees(tone_phase_crb_rad(rho)),
        residual_phase_deg=residual_phase_deg, residual_amplitude_db=residual_amplitude_db,
        neighbour_misfit_db=neighbour_misfit_db, expected_misfit_db=expected_misfit_db,
        azimuth_uncalibrated_deg=float(np.mean(az_u)), elevation_uncalibrated_deg=float(np.mean(el_u)),
        azimuth_calibrated_deg=float(np.mean(az_c)), elevation_calibrated_deg=float(np.mean(el_c)),
        azimuth_calibrated_std_deg=float(np.std(az_c)),
        psl_uncalibrated_db=psl_unc, psl_calibrated_db=psl_cal,
        far_field_m=far_field_m, near_limit_m=near_limit_m, clipped_samples=sums.clipped, warnings=warnings,
        refusals=refusals)


def _chain_angles(estimator, snapshots: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The strongest angle peak of each snapshot, as the chain's angle estimator finds it."""
    res = estimator.estimate(snapshots.astype(np.complex64))
    az = np.full(snapshots.shape[0], np.nan)
    el = np.full(snapshots.shape[0], np.nan)
    seen = set()
    for i, d in enumerate(res.det_index):
        if int(d) not in seen:
            seen.add(int(d))
            az[d], el[d] = res.azimuth_deg[i], res.elevation_deg[i]
    return az[np.isfinite(az)], el[np.isfinite(el)]


def calibrate_capture(capture: str | Path, target_range_m: float, azimuth_deg: float = 0.0,
                      elevation_deg: float = 0.0, *, search_cells: int = DEFAULT_SEARCH_CELLS,
                      skip_corrupt: bool = False, iq: bool = True) -> CalibrationResult:
    """estimate_calibration over every readable frame of a capture file (its embedded sensor); with
    `iq`, the I/Q imbalance estimated first (a pass of its own) and corrected in the array pass."""
    from .capture import CaptureReader
    from .files import capture_sensor, iter_capture_frames

    iq_result = calibrate_iq_capture(capture, skip_corrupt=skip_corrupt)[1] if iq else None
    with CaptureReader(capture, skip_corrupt=skip_corrupt) as reader:
        sensor = capture_sensor(reader)
        frames = (frame for _, _, frame in iter_capture_frames(reader, sensor))
        result = estimate_calibration(sensor, frames, target_range_m, azimuth_deg, elevation_deg,
                                      search_cells=search_cells,
                                      iq_imbalance=None if iq_result is None else iq_result.table)
        for p in reader.problems:
            result.warnings.append(f"capture: {p}")
    result.capture = str(capture)
    result.iq = iq_result
    return result


def calibrate_iq_capture(capture: str | Path, *, skip_corrupt: bool = False) -> tuple[Sensor, IqResult]:
    """The blind I/Q imbalance estimate over every readable frame of a capture (any scene)."""
    from .capture import CaptureReader
    from .files import capture_sensor, iter_capture_frames

    with CaptureReader(capture, skip_corrupt=skip_corrupt) as reader:
        sensor = capture_sensor(reader)
        res = estimate_iq_imbalance(sensor, (frame for _, _, frame in iter_capture_frames(reader, sensor)))
    return sensor, res


# ---- the terminal report ----------------------------------------------------------------------

def format_report(result: CalibrationResult) -> str:
    """A readable summary for the terminal."""
    s = result.sensor
    out = [
        f"sensor        {s.sensor_id} (digest {s.digest}), {s.n_tx} TX x {s.n_rx} RX = {s.n_virtual} virtual channels",
        f"reflector     given {result.target_range_m:.3f} m, azimuth {result.azimuth_deg:+.2f} deg, "
        f"elevation {result.elevation_deg:+.2f} deg; {result.frames_used} frames",
        f"range         measured {result.measured_range_m:.4f} m, bias {result.range_bias_m * 1e3:+.2f} mm "
        f"(rms over frames {result.range_rms_m * 1e3:.2f} mm)",
        f"SNR           {result.cell_snr_db:.1f} dB per channel and frame, {result.integrated_snr_db:.1f} dB "
        f"integrated (needed {MIN_INTEGRATED_SNR_DB:.1f} dB for {PHASE_ACCURACY_DEG:g} deg); expected phase "
        f"error {result.predicted_phase_deg:.3f} deg",
        f"residuals     phase {np.sqrt(np.mean(result.residual_phase_deg ** 2)):.3f} deg rms (noise alone: "
        f"{result.frame_phase_deg:.3f}), amplitude {np.sqrt(np.mean(result.residual_amplitude_db ** 2)):.3f} dB "
        f"rms, frame to frame; cells beside the "
        f"reflector fit one point to {result.neighbour_misfit_db:.1f} dB (noise {result.expected_misfit_db:.1f} dB)",
        f"azimuth       chain estimate {result.azimuth_uncalibrated_deg:+.3f} deg uncalibrated, "
        f"{result.azimuth_calibrated_deg:+.3f} deg calibrated (given {result.azimuth_deg:+.2f})",
        f"sidelobes     azimuth beam peak sidelobe {result.psl_uncalibrated_db:.1f} dB uncalibrated, "
        f"{result.psl_calibrated_db:.1f} dB calibrated",
        "channel  tx rx   gain dB   phase deg   resid deg   resid dB",
    ]
    for v in range(s.n_virtual):
        out.append(f"  {v:5d}  {v // s.n_rx:2d} {v % s.n_rx:2d}  {result.gain_db[v]:+8.3f}  {result.gain_phase_deg[v]:+10.3f}"
                   f"  {result.residual_phase_deg[v]:10.3f}  {result.residual_amplitude_db[v]:9.3f}")
    if result.iq is not None:
        out += format_iq_report(result.iq)
    out.append(f"note          {RANGE_BIAS_NOTE}")
    if result.refusals:
        out.append(f"refused       {len(result.refusals)}: no usable calibration (--force writes it anyway):")
        out += [f"  - {w}" for w in result.refusals]
    if result.warnings:
        out.append(f"warnings      {len(result.warnings)}:")
        out += [f"  - {w}" for w in result.warnings]
    else:
        out.append("warnings      none")
    return "\n".join(out)


# ---- command line -----------------------------------------------------------------------------

def run(args) -> int:
    """`cubecast calibrate`: the report and the file written at INFO, each warning at WARNING. A refused
    capture (CalibrationResult.refusals) writes nothing and raises CubecastError (exit 2), unless
    --force: then the file is written and each refusal is logged as a warning too."""
    if args.iq_only:
        return _run_iq_only(args)
    if args.target_range_m is None:
        raise CubecastError("--target-range-m: required (the reflector's range), unless --iq-only")
    result = calibrate_capture(args.capture, args.target_range_m, args.azimuth_deg, args.elevation_deg,
                               search_cells=args.search_cells, skip_corrupt=args.skip_corrupt, iq=not args.no_iq)
    log.info("%s", format_report(result))
    write_calibration(args.out, result, force=args.force)
    log.info("wrote %s", args.out)
    for w in result.refusals:
        log.warning("cubecast calibrate: warning: written with --force: %s", w)
    for w in result.warnings:
        log.warning("cubecast calibrate: warning: %s", w)
    _log_iq(result.iq, result.sensor)
    return 0


def _log_iq(iq: IqResult | None, sensor: Sensor) -> None:
    """The I/Q estimate's refusals and warnings (a real-sampled ADC has nothing to estimate: INFO)."""
    if iq is None:
        return
    for w in iq.refusals:
        if sensor.adc.is_complex:
            log.warning("cubecast calibrate: warning: no I/Q correction written: %s", w)
        else:
            log.info("no I/Q correction written: %s", w)
    for w in iq.warnings:
        log.warning("cubecast calibrate: warning: I/Q: %s", w)


def _run_iq_only(args) -> int:
    """`calibrate --iq-only`: the I/Q imbalance alone; a refused estimate writes nothing (exit 2)."""
    for flag, given in (("--target-range-m", args.target_range_m is not None), ("--no-iq", args.no_iq),
                        ("--force", args.force)):
        if given:
            raise CubecastError(f"{flag}: not with --iq-only")
    sensor, iq = calibrate_iq_capture(args.capture, skip_corrupt=args.skip_corrupt)
    log.info("%s", "\n".join(format_iq_report(iq)))
    write_iq_calibration(args.out, sensor, iq, str(args.capture))
    log.info("wrote %s", args.out)
    for w in iq.warnings:
        log.warning("cubecast calibrate: warning: I/Q: %s", w)
    return 0


def add_parser(subparsers):
    """Add the `calibrate` subcommand to an argparse subparsers object; returns its parser."""
    p = subparsers.add_parser(
        "calibrate", help="measure the virtual channels' gains and the range bias from a capture of a "
                          "corner reflector at a known place")
    p.add_argument("capture", help="capture file of a static corner reflector")
    p.add_argument("--target-range-m", type=float, help="the reflector's range from the sensor origin (required "
                                                        "unless --iq-only)")
    p.add_argument("--azimuth-deg", type=float, default=0.0, help="its azimuth, positive right (default 0)")
    p.add_argument("--elevation-deg", type=float, default=0.0, help="its elevation, positive up (default 0)")
    p.add_argument("--out", required=True, help="calibration file to write (TOML)")
    p.add_argument("--search-cells", type=int, default=DEFAULT_SEARCH_CELLS,
                   help=f"look for the reflector within this many range cells of the given range "
                        f"(default {DEFAULT_SEARCH_CELLS})")
    p.add_argument("--skip-corrupt", action="store_true", help="skip frames whose CRC fails")
    p.add_argument("--iq-only", action="store_true",
                   help="estimate only each receive channel's I/Q imbalance, from any capture (no reflector); "
                        "the file has no array gains")
    p.add_argument("--no-iq", action="store_true", help="do not estimate the I/Q imbalance (no [[iq_imbalance]] "
                                                        "in the file, no correction)")
    p.add_argument("--force", action="store_true",
                   help="write the file even when the capture is refused (no reflector, or too weak for gain "
                        f"phases to {PHASE_ACCURACY_DEG:g} deg); the refusals are still logged as warnings")
    p.set_defaults(func=run)
    return p
