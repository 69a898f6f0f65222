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

Checks (each produces a warning, on stderr and in the file's [report] section; the rule is stated
in the warning):
- weak: the per-channel SNR of the reflector's cell integrated over the frames used is below
  MIN_INTEGRATED_SNR_DB. The phase of a complex sample with SNR rho has standard deviation
  1 / sqrt(2 rho) rad at high SNR (Rife and Boorstyn, "Single-tone parameter estimation from
  discrete-time observations", IEEE Trans. IT, 1974): 30 dB gives 1.3 deg.
- near: the range is below max(2 D^2 / lambda, NEAR_RANGE_CELLS range resolutions), D the largest
  distance between two virtual elements (the far-field distance of the aperture, common practice)
  and the first range cells being where TX-RX coupling and the DC leakage live.
- not alone: another local maximum of the range-Doppler map within NEIGHBOUR_CELLS range and
  Doppler cells of the reflector, at most NEIGHBOUR_LEVEL_DB below it (and 15 dB above the noise);
  or, after calibration, the two range cells beside the reflector's fit one point in the known
  direction worse than MISFIT_LIMIT_DB (a second scatterer at a slightly different range); or the
  uncalibrated azimuth beam has a second peak outside the main lobe at most SECOND_ANGLE_PEAK_DB
  below the main one where a lone reflector's beam would be lower (a second reflector at the same
  range, or multipath; very large channel errors can also do this).
- not static: the reflector's cell is not the Doppler maximum of its range cell.
- clipping: ADC samples at full scale in any frame.
- channel: a channel's gain more than CHANNEL_GAIN_LIMIT_DB from the mean amplitude.

The calibration file is TOML in our own layout (see README "Calibration file"), written and read
back in calibfile.py (its names are also importable from here); `load_calibration` gives the
complex64 vector the Pipeline takes, checking that the file was made for the sensor.
"""

from __future__ import annotations

import dataclasses
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

import numpy as np

from .calibfile import (CALIBRATION_FORMAT, CALIBRATION_VERSION, RANGE_BIAS_NOTE, CalibrationFile, format_calibration,
                        load_calibration, load_calibration_file, write_calibration)
from .errors import CubecastError
from .scene import polar_to_cartesian
from .sensor import SPEED_OF_LIGHT_MPS, Sensor
from .settings import ProcessingSettings

__all__ = [
    "CALIBRATION_FORMAT",
    "CALIBRATION_VERSION",
    "MIN_INTEGRATED_SNR_DB",
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

MIN_INTEGRATED_SNR_DB = 30.0  # per-channel cell SNR x frames; 1 / sqrt(2 rho) = 1.3 deg at 30 dB
NEAR_RANGE_CELLS = 5  # the reflector must be at least this many range resolutions away ...
# ... and beyond the far-field distance 2 D^2 / lambda of the virtual aperture
NEIGHBOUR_CELLS = 6  # range and Doppler cells either side searched for other peaks
NEIGHBOUR_LEVEL_DB = -20.0  # another peak there at or above this level (re the reflector) warns
NEIGHBOUR_NOISE_MARGIN_DB = 15.0  # ... if it also stands this far above the map's noise floor
MISFIT_LIMIT_DB = -20.0  # calibrated cells beside the reflector must fit one point this well
SECOND_ANGLE_PEAK_DB = -6.0  # a second uncalibrated beam peak at or above this level warns
CHANNEL_GAIN_LIMIT_DB = 6.0  # a channel this far from the mean amplitude is suspect (dead, unplugged)
DEFAULT_SEARCH_CELLS = 4
FINE_RANGE_PADDING = 16  # zero padding of the fine range spectrum for the range bias


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


def _virtual_aperture_m(sensor: Sensor) -> float:
    pos = sensor.virtual_positions_m
    return float(np.sqrt(((pos[:, None, :] - pos[None, :, :]) ** 2).sum(-1)).max())


def _log_parabola(lo: float, mid: float, hi: float) -> float:
    """Fractional peak offset from three power samples (Gaussian interpolation, common practice)."""
    a, b, c = (math.log(max(v, 1e-300)) for v in (lo, mid, hi))
    den = a - 2.0 * b + c
    return float(np.clip(0.5 * (a - c) / den, -0.5, 0.5)) if den < 0 else 0.0


def _beam_u(snapshot: np.ndarray, pos_m: np.ndarray, wavelength_m: float, w: float, u: np.ndarray) -> np.ndarray:
    """|sum_v conj(steer_v(u, w)) s_v|^2 with steer_v = exp(-j 2 pi / lambda (u x_v + w z_v))."""
    k0 = 2.0 * np.pi / wavelength_m
    ph = k0 * (u[:, None] * pos_m[None, :, 0] + w * pos_m[None, :, 2])
    return np.abs(np.exp(1j * ph) @ snapshot) ** 2


def _local_maxima(p: np.ndarray) -> np.ndarray:
    inner = np.flatnonzero((p[1:-1] > p[:-2]) & (p[1:-1] >= p[2:])) + 1
    return inner


def _db(x: float) -> float:
    return 10.0 * math.log10(x) if x > 0 else -math.inf


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
    capture: str = ""

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


def estimate_calibration(sensor: Sensor, frames: Iterable[np.ndarray], target_range_m: float,
                         azimuth_deg: float = 0.0, elevation_deg: float = 0.0, *,
                         search_cells: int = DEFAULT_SEARCH_CELLS) -> CalibrationResult:
    """Measure the virtual channels' gains and the range bias from canonical frames (complex64
    [chirp, rx, sample]) of a static point reflector at (target_range_m, azimuth_deg,
    elevation_deg). Pure: no I/O. Raises CubecastError when the reflector cannot be found."""
    from .chain.pipeline import Pipeline  # the chain imports numba kernels: load on use

    r0 = _check_number("--target-range-m", target_range_m, positive=True)
    az0 = _check_number("--azimuth-deg", azimuth_deg, -90.0, 90.0)
    el0 = _check_number("--elevation-deg", elevation_deg, -90.0, 90.0)
    if isinstance(search_cells, bool) or not isinstance(search_cells, (int, np.integer)) or search_cells < 1:
        raise CubecastError(f"--search-cells {search_cells!r}: must be a whole number of at least 1")
    settings = calibration_settings()
    pipe = Pipeline(sensor, settings)
    rng_fft, dop = pipe.range_fft, pipe.doppler_fft
    bin_m, n_range, n_dop = rng_fft.bin_m, rng_fft.n_bins, dop.fft_size
    expected_bin = r0 / bin_m
    lo = max(1, int(math.floor(expected_bin - search_cells)))
    hi = min(n_range - 2, int(math.ceil(expected_bin + search_cells)))
    if expected_bin > n_range - 2 or lo > hi:
        raise CubecastError(f"--target-range-m {r0:g}: beyond the sensor's maximum range "
                            f"{sensor.max_range_m:.2f} m")
    c0 = n_dop // 2  # zero Doppler in the (shifted) detection map; column 0 of the spectrum
    n_loops, n_slots, n_rx, n_samp = sensor.n_loops, sensor.n_slots, sensor.n_rx, sensor.samples_per_chirp
    # noise reference: cells well away from zero Doppler (where every static echo sits); with too few
    # Doppler bins for that, the range cells away from the search window
    noise_mask = np.zeros((n_range, n_dop), bool)
    noise_mask[:, np.abs(np.arange(n_dop) - c0) >= max(3, n_dop // 8)] = True
    if not noise_mask.any():
        noise_mask[:max(0, lo - NEIGHBOUR_CELLS)] = True
        noise_mask[hi + NEIGHBOUR_CELLS + 1:] = True
    if not noise_mask.any():
        raise CubecastError(f"sensor '{sensor.sensor_id}': too few range and Doppler cells to measure the noise")
    full_scale = sensor.adc.full_scale

    cells, loop_means, noise, maps = [], [], [], None
    clipped = 0
    for frame in frames:
        pipe.process(frame)
        # zero-Doppler slot values over the search window and one cell either side: [rx, slot, bins]
        cells.append(dop.spectrum[:, :, lo - 1: hi + 2, 0].astype(np.complex128))
        dmap = pipe.detection_map
        maps = dmap.astype(np.float64) if maps is None else maps + dmap
        noise.append(float(np.median(dmap[noise_mask])))
        # static reflector: the loop average of each (slot, rx) keeps it and cuts the noise n_loops times
        loop_means.append(frame.reshape(n_loops, n_slots, n_rx, n_samp).mean(axis=0, dtype=np.complex128))
        clipped += int(np.count_nonzero((np.abs(frame.real) >= full_scale)
                                        | (np.abs(frame.imag) >= full_scale)))
    n_frames = len(cells)
    if n_frames == 0:
        raise CubecastError("calibration needs at least one frame; the capture has no readable frames")

    mean_map = maps / n_frames
    zero_col = mean_map[:, c0]
    window_power = zero_col[lo: hi + 1]
    rb = lo + int(np.argmax(window_power))
    lo_m, hi_m = lo * bin_m, hi * bin_m
    if not (zero_col[rb] > zero_col[rb - 1] and zero_col[rb] >= zero_col[rb + 1]):
        raise CubecastError(
            f"--target-range-m {r0:g}: no reflector peak at zero Doppler within {search_cells} range cells "
            f"({lo_m:.2f}..{hi_m:.2f} m); the strongest zero-Doppler cell there ({rb * bin_m:.2f} m) is on the "
            f"slope of something outside the window: check the range or widen --search-cells")

    warnings: list[str] = []
    # ---- noise and SNR ----
    k_channels = dop.n_channels
    # the map is a sum of K exponential noise powers: its median is about K - 1/3 times one
    # channel's noise power (median of a Gamma(K) variable; from memory, common practice)
    sigma2_c = float(np.mean(noise)) / (k_channels - 1.0 / 3.0)
    decode = pipe.mimo.decode  # [tx, slot]
    sigma2_v = np.repeat(sigma2_c * (np.abs(decode) ** 2).sum(axis=1), n_rx)  # [V], v = k * n_rx + l

    slot_vals = np.stack(cells)  # [F, rx, slot, bins]
    j = rb - lo + 1  # index of the reflector's bin in the stored window
    zero_hz = np.zeros((n_frames, 1))

    frames_index = np.arange(n_frames)
    first_col = np.zeros(n_frames, np.int64)

    def snapshots(jj: int) -> np.ndarray:
        # the frames' values of bin jj as a spectrum [rx, slot, frame, 1], one "cell" per frame
        sv = np.ascontiguousarray(slot_vals[:, :, :, jj].transpose(1, 2, 0), np.complex64)[..., None]
        return pipe.mimo.snapshots(sv, frames_index, first_col, zero_hz)[:, 0, :].astype(np.complex128)

    z = snapshots(j)  # [F, V]
    rho = max(float(np.mean(np.abs(z) ** 2 / sigma2_v[None, :])) - 1.0, 1e-12)
    cell_snr_db = _db(rho)
    integrated_snr_db = cell_snr_db + 10.0 * math.log10(n_frames)
    predicted_phase_deg = math.degrees(1.0 / math.sqrt(2.0 * rho * n_frames))
    if integrated_snr_db < MIN_INTEGRATED_SNR_DB:
        warnings.append(
            f"reflector too weak: per-channel SNR {cell_snr_db:.1f} dB in its cell, {integrated_snr_db:.1f} dB "
            f"over {n_frames} frames, below the {MIN_INTEGRATED_SNR_DB:.0f} dB limit (expected gain phase error "
            f"{predicted_phase_deg:.2f} deg rms, 1 / sqrt(2 SNR)); use a larger reflector, a shorter range or "
            f"more frames")

    # ---- near ----
    lam = sensor.wavelength_m
    aperture = _virtual_aperture_m(sensor)
    far_field_m = 2.0 * aperture ** 2 / lam
    near_limit_m = max(far_field_m, NEAR_RANGE_CELLS * sensor.range_resolution_m)
    if r0 < near_limit_m:
        warnings.append(
            f"reflector too near: {r0:.3f} m is inside {near_limit_m:.3f} m = max(2 D^2 / lambda = "
            f"{far_field_m:.3f} m with D = {aperture * 1e3:.1f} mm the virtual aperture, {NEAR_RANGE_CELLS} range "
            f"cells = {NEAR_RANGE_CELLS * sensor.range_resolution_m:.3f} m); move it further away")

    # ---- other peaks in range / Doppler ----
    floor = k_channels * sigma2_c
    p_ref = mean_map[rb, c0]
    r_a, r_b = max(0, rb - NEIGHBOUR_CELLS), min(n_range, rb + NEIGHBOUR_CELLS + 1)
    d_a, d_b = max(0, c0 - NEIGHBOUR_CELLS), min(n_dop, c0 + NEIGHBOUR_CELLS + 1)
    level = max(p_ref * 10.0 ** (NEIGHBOUR_LEVEL_DB / 10.0), floor * 10.0 ** (NEIGHBOUR_NOISE_MARGIN_DB / 10.0))
    vel_per_col = dop.bin_hz * lam / 2.0
    for rr in range(r_a, r_b):
        for dd in range(d_a, d_b):
            if rr == rb and dd == c0:
                continue
            v = mean_map[rr, dd]
            if v < level:
                continue
            nb = mean_map[max(0, rr - 1): rr + 2, max(0, dd - 1): dd + 2]
            if v < nb.max():
                continue
            warnings.append(
                f"reflector not alone: another peak at {rr * bin_m:.2f} m, {(dd - c0) * vel_per_col:+.2f} m/s, "
                f"{_db(v / p_ref):.1f} dB re the reflector (limit: nothing within {NEIGHBOUR_CELLS} range and "
                f"Doppler cells above {NEIGHBOUR_LEVEL_DB:.0f} dB); clear the area around the reflector")
    row = mean_map[rb]
    if row[c0 - 1] > row[c0] or row[(c0 + 1) % n_dop] > row[c0]:
        warnings.append(
            f"reflector not static: at {rb * bin_m:.2f} m the Doppler maximum is not at zero velocity; "
            f"the calibration assumes a still reflector and sensor")

    # ---- gains ----
    pos_t = polar_to_cartesian(r0, az0, el0)
    ideal = ideal_snapshot(sensor, pos_t, [rb - 1, rb, rb + 1], rng_fft.window, rng_fft.fft_size)  # [3, V]
    ratio = z / ideal[1][None, :]
    common = np.exp(-1j * np.angle(ratio.sum(axis=1)))  # [F] common phase per frame
    ratio *= common[:, None]
    mean_ratio = ratio.mean(axis=0)
    amp = np.abs(mean_ratio)
    if np.any(amp <= 0) or not np.all(np.isfinite(mean_ratio)):
        raise CubecastError("calibration failed: a virtual channel has no signal from the reflector")
    gain = mean_ratio / amp.mean() * np.exp(-1j * np.angle(mean_ratio[0]))
    vector = (1.0 / gain).astype(np.complex64)
    gain_db = 20.0 * np.log10(np.abs(gain))
    for v in np.flatnonzero(np.abs(gain_db) > CHANNEL_GAIN_LIMIT_DB):
        warnings.append(
            f"channel {v} (TX {v // n_rx}, RX {v % n_rx}) gain {gain_db[v]:+.1f} dB re the mean, beyond "
            f"+-{CHANNEL_GAIN_LIMIT_DB:.0f} dB: a dead, unplugged or saturated channel? its correction "
            f"{-gain_db[v]:+.1f} dB also scales its noise")
    if n_frames > 1:
        dev = ratio / mean_ratio[None, :]
        residual_phase_deg = np.degrees(np.sqrt(np.mean(np.angle(dev) ** 2, axis=0)))
        residual_amplitude_db = np.sqrt(np.mean((20.0 * np.log10(np.abs(dev))) ** 2, axis=0))
    else:
        residual_phase_deg = np.full(sensor.n_virtual, np.nan)
        residual_amplitude_db = np.full(sensor.n_virtual, np.nan)

    # ---- calibrated cells beside the reflector: one point in the known direction? ----
    misfits, expected = [], []
    n_virt = sensor.n_virtual
    for side, jj in ((0, j - 1), (2, j + 1)):
        zb = snapshots(jj)
        y = (zb * common[:, None]).mean(axis=0) / gain
        a = ideal[side]
        fit = abs(np.vdot(a, y)) ** 2 / (np.vdot(y, y).real * np.vdot(a, a).real)
        misfits.append(max(1.0 - fit, 1e-16))
        # noise alone leaves (V - 1) / V of its power outside the fitted direction: misfit 1 / (V rho F) x (V - 1)
        rho_b = max(float(np.mean(np.abs(zb) ** 2 / sigma2_v[None, :])) - 1.0, 1e-12)
        expected.append((n_virt - 1) / n_virt / (rho_b * n_frames))
    worst = int(np.argmax(misfits))
    neighbour_misfit_db = _db(misfits[worst])
    expected_misfit_db = _db(expected[worst])
    if neighbour_misfit_db > MISFIT_LIMIT_DB and misfits[worst] > 10.0 * expected[worst]:
        warnings.append(
            f"reflector not alone: after calibration the range cell {'before' if worst == 0 else 'after'} the "
            f"reflector fits one point in the given direction only to {neighbour_misfit_db:.1f} dB (limit "
            f"{MISFIT_LIMIT_DB:.0f} dB, noise alone gives {expected_misfit_db:.1f} dB): a second scatterer close "
            f"in range")

    # ---- uncalibrated azimuth beam: a second angle peak? ----
    pos_v = sensor.virtual_positions_m
    w0 = math.sin(math.radians(el0))
    u0 = math.sin(math.radians(az0)) * math.cos(math.radians(el0))
    z_mean = (z * common[:, None]).mean(axis=0)
    psl_unc = psl_cal = math.nan
    if np.ptp(pos_v[:, 0]) > 0:
        u = np.linspace(-1.0, 1.0, 4001)
        b_ideal = _beam_u(ideal[1], pos_v, lam, w0, u)
        b_meas = _beam_u(z_mean, pos_v, lam, w0, u)
        b_cal = _beam_u(z_mean / gain, pos_v, lam, w0, u)
        i0 = int(np.argmin(np.abs(u - u0)))
        # main lobe of a lone reflector: from its peak down to the nearest minima either side
        pk = i0
        while 0 < pk < len(u) - 1 and max(b_ideal[pk - 1], b_ideal[pk + 1]) > b_ideal[pk]:
            pk += 1 if b_ideal[pk + 1] > b_ideal[pk - 1] else -1
        a_i = pk
        while a_i > 0 and b_ideal[a_i - 1] < b_ideal[a_i]:
            a_i -= 1
        b_i = pk
        while b_i < len(u) - 1 and b_ideal[b_i + 1] < b_ideal[b_i]:
            b_i += 1
        outside = np.ones(len(u), bool)
        outside[a_i: b_i + 1] = False
        ideal_rel = b_ideal / b_ideal.max()

        def psl(beam: np.ndarray) -> float:
            mx = _local_maxima(beam)
            mx = mx[outside[mx]]
            main = beam[a_i: b_i + 1].max()
            return _db(beam[mx].max() / main) if mx.size else -math.inf

        psl_unc, psl_cal = psl(b_meas), psl(b_cal)
        main = b_meas[a_i: b_i + 1].max()
        thr = 10.0 ** (SECOND_ANGLE_PEAK_DB / 10.0)
        for m in _local_maxima(b_meas):
            if outside[m] and b_meas[m] >= thr * main and ideal_rel[m] < thr:
                az_m = math.degrees(math.asin(float(np.clip(u[m] / max(math.cos(math.radians(el0)), 1e-9), -1, 1))))
                warnings.append(
                    f"second angle peak: the uncalibrated azimuth beam has a peak at {az_m:.1f} deg only "
                    f"{_db(b_meas[m] / main):.1f} dB below the main one (limit {SECOND_ANGLE_PEAK_DB:.0f} dB): a "
                    f"second reflector at the same range or multipath would spoil the calibration (channel "
                    f"errors far above 45 deg rms can also cause this)")

    # ---- the chain's own angle estimate, without and with the calibration ----
    az_u, el_u = _chain_angles(pipe.angle, z)
    cal_pipe = Pipeline(sensor, settings, vector)
    az_c, el_c = _chain_angles(cal_pipe.angle, z)

    # ---- fine range: 16x zero-padded range spectrum of the loop averages, power over channels ----
    lm = np.stack(loop_means)  # [F, slot, rx, N]
    n_fine = FINE_RANGE_PADDING * rng_fft.fft_size
    spec = np.fft.fft(lm * rng_fft.window.astype(np.float64), n=n_fine, axis=-1)
    kc = rb * FINE_RANGE_PADDING
    ka, kb = kc - 2 * FINE_RANGE_PADDING, kc + 2 * FINE_RANGE_PADDING + 1
    pw = (np.abs(spec[..., ka:kb]) ** 2).sum(axis=(1, 2))  # [F, window]

    def fine_range(p: np.ndarray) -> float:
        i = int(np.argmax(p[1:-1])) + 1
        return (ka + i + _log_parabola(p[i - 1], p[i], p[i + 1])) / FINE_RANGE_PADDING * bin_m

    measured_range_m = fine_range(pw.sum(axis=0))
    per_frame = np.array([fine_range(p) for p in pw])
    range_rms_m = float(np.sqrt(np.mean((per_frame - per_frame.mean()) ** 2))) if n_frames > 1 else math.nan

    if clipped:
        warnings.append(f"ADC clipping: {clipped} samples at full scale ({full_scale:g}); the clipped "
                        f"channels' gains are wrong: reduce the reflector's size or move it further away")

    return CalibrationResult(
        sensor=sensor, gain=gain, vector=vector, target_range_m=r0, azimuth_deg=az0, elevation_deg=el0,
        target_position_m=pos_t, measured_range_m=measured_range_m, range_bias_m=measured_range_m - r0,
        range_rms_m=range_rms_m, range_bin=rb, frames_used=n_frames, cell_snr_db=cell_snr_db,
        integrated_snr_db=integrated_snr_db, predicted_phase_deg=predicted_phase_deg,
        frame_phase_deg=math.degrees(1.0 / math.sqrt(2.0 * rho)),
        residual_phase_deg=residual_phase_deg, residual_amplitude_db=residual_amplitude_db,
        neighbour_misfit_db=neighbour_misfit_db, expected_misfit_db=expected_misfit_db,
        azimuth_uncalibrated_deg=float(np.mean(az_u)), elevation_uncalibrated_deg=float(np.mean(el_u)),
        azimuth_calibrated_deg=float(np.mean(az_c)), elevation_calibrated_deg=float(np.mean(el_c)),
        azimuth_calibrated_std_deg=float(np.std(az_c)),
        psl_uncalibrated_db=psl_unc, psl_calibrated_db=psl_cal,
        far_field_m=far_field_m, near_limit_m=near_limit_m, clipped_samples=clipped, warnings=warnings)


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
                      skip_corrupt: bool = False) -> CalibrationResult:
    """estimate_calibration over every readable frame of a capture file (its embedded sensor)."""
    from .capture import CaptureReader
    from .files import capture_sensor, iter_capture_frames

    with CaptureReader(capture, skip_corrupt=skip_corrupt) as reader:
        sensor = capture_sensor(reader)
        frames = (frame for _, _, frame in iter_capture_frames(reader, sensor))
        result = estimate_calibration(sensor, frames, target_range_m, azimuth_deg, elevation_deg,
                                      search_cells=search_cells)
        for p in reader.problems:
            result.warnings.append(f"capture: {p}")
    result.capture = str(capture)
    return result


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
        f"integrated (limit {MIN_INTEGRATED_SNR_DB:.0f} dB); expected phase error "
        f"{result.predicted_phase_deg:.3f} deg",
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
    out.append(f"note          {RANGE_BIAS_NOTE}")
    if result.warnings:
        out.append(f"warnings      {len(result.warnings)}:")
        out += [f"  - {w}" for w in result.warnings]
    else:
        out.append("warnings      none")
    return "\n".join(out)


# ---- command line -----------------------------------------------------------------------------

def run(args) -> int:
    result = calibrate_capture(args.capture, args.target_range_m, args.azimuth_deg, args.elevation_deg,
                               search_cells=args.search_cells, skip_corrupt=args.skip_corrupt)
    write_calibration(args.out, result)
    if not args.quiet:
        print(format_report(result))
        print(f"wrote {args.out}")
    for w in result.warnings:
        print(f"cubecast calibrate: warning: {w}", file=sys.stderr)
    return 0


def add_parser(subparsers):
    """Add the `calibrate` subcommand to an argparse subparsers object; returns its parser."""
    p = subparsers.add_parser(
        "calibrate", help="measure the virtual channels' gains and the range bias from a capture of a "
                          "corner reflector at a known place")
    p.add_argument("capture", help="capture file of a static corner reflector")
    p.add_argument("--target-range-m", type=float, required=True, help="the reflector's range from the sensor origin")
    p.add_argument("--azimuth-deg", type=float, default=0.0, help="its azimuth, positive right (default 0)")
    p.add_argument("--elevation-deg", type=float, default=0.0, help="its elevation, positive up (default 0)")
    p.add_argument("--out", required=True, help="calibration file to write (TOML)")
    p.add_argument("--search-cells", type=int, default=DEFAULT_SEARCH_CELLS,
                   help=f"look for the reflector within this many range cells of the given range "
                        f"(default {DEFAULT_SEARCH_CELLS})")
    p.add_argument("--skip-corrupt", action="store_true", help="skip frames whose CRC fails")
    p.add_argument("--quiet", action="store_true", help="no report on stdout (warnings still go to stderr)")
    p.set_defaults(func=run)
    return p
