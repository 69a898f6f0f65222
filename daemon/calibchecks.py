"""The checks of a calibration (calibrate.py): is the reflector strong, far, alone, static, unclipped,
and is every channel alive? Pure functions of what the estimation measured; each returns its
warnings (possibly none) and the figures the result records.

Refusals: a capture that cannot give a usable calibration is refused (`calibrate` writes nothing and
exits 2 unless --force; reflector_refusals). The phase of a complex sample with SNR rho has standard
deviation 1 / sqrt(2 rho) rad at high SNR (the Cramér-Rao bound of a phase: Rife and Boorstyn,
"Single-tone parameter estimation from discrete-time observations", IEEE Trans. IT, 1974; Kay,
"Fundamentals of Statistical Signal Processing: Estimation Theory", 1993); averaged over F frames the
channel's gain phase has 1 / sqrt(2 F rho). The calibration states PHASE_ACCURACY_DEG (1 deg rms per
channel), so it needs an integrated per-channel SNR F rho of MIN_INTEGRATED_SNR_DB = 10 log10(1 / (2
(1 deg in rad)^2)) = 32.2 dB. Refused:
- no reflector: the reflector's cell is no brighter than noise alone makes the brightest of the
  searched cells with probability DETECTION_FALSE_ALARM (mean |z|^2 / sigma^2 over the F x V samples
  of a cell is Gamma(F V) / (F V) distributed under noise alone; common practice), or it is no peak
  (the slope of an echo outside the searched cells);
- too weak: a reflector is there, but its integrated SNR is below MIN_INTEGRATED_SNR_DB.
Each refusal says what would make the capture usable: where to put a reflector and how large (by the
sensor description's link budget), the range of a strong enough echo seen elsewhere, or how many
frames, how much more RCS or how much nearer.

Each check below gives a warning (logged, and kept in the calibration file's [report] section) that
states its rule:
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
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .sensor import Sensor

PHASE_ACCURACY_DEG = 1.0  # the calibration's stated accuracy: each channel's gain phase to 1 deg rms
MIN_INTEGRATED_SNR_DB = 10.0 * math.log10(1.0 / (2.0 * math.radians(PHASE_ACCURACY_DEG) ** 2))  # 32.2 dB
DETECTION_FALSE_ALARM = 1e-6  # chance that noise alone passes for a reflector somewhere in the searched cells
ESTIMATE_SIGMAS = 3.0  # advice (frames, RCS, range) from the SNR estimate less this many standard deviations
NEAR_RANGE_CELLS = 5  # the reflector must be at least this many range resolutions away ...
# ... and beyond the far-field distance 2 D^2 / lambda of the virtual aperture
NEIGHBOUR_CELLS = 6  # range and Doppler cells either side searched for other peaks
NEIGHBOUR_LEVEL_DB = -20.0  # another peak there at or above this level (re the reflector) warns
NEIGHBOUR_NOISE_MARGIN_DB = 15.0  # ... if it also stands this far above the map's noise floor
MISFIT_LIMIT_DB = -20.0  # calibrated cells beside the reflector must fit one point this well
SECOND_ANGLE_PEAK_DB = -6.0  # a second uncalibrated beam peak at or above this level warns
CHANNEL_GAIN_LIMIT_DB = 6.0  # a channel this far from the mean amplitude is suspect (dead, unplugged)


def _virtual_aperture_m(sensor: Sensor) -> float:
    pos = sensor.virtual_positions_m
    return float(np.sqrt(((pos[:, None, :] - pos[None, :, :]) ** 2).sum(-1)).max())


def _beam_u(snapshot: np.ndarray, pos_m: np.ndarray, wavelength_m: float, w: float, u: np.ndarray) -> np.ndarray:
    """|sum_v conj(steer_v(u, w)) s_v|^2 with steer_v = exp(-j 2 pi / lambda (u x_v + w z_v))."""
    k0 = 2.0 * np.pi / wavelength_m
    ph = k0 * (u[:, None] * pos_m[None, :, 0] + w * pos_m[None, :, 2])
    return np.abs(np.exp(1j * ph) @ snapshot) ** 2


def _local_maxima(p: np.ndarray) -> np.ndarray:
    inner = np.flatnonzero((p[1:-1] > p[:-2]) & (p[1:-1] >= p[2:])) + 1
    return inner


def db(x: float) -> float:
    return 10.0 * math.log10(x) if x > 0 else -math.inf


def cell_snr(z: np.ndarray, sigma2_v: np.ndarray) -> float:
    """Per-channel, per-frame SNR of snapshots z [F, V] (signal power over noise, noise removed)."""
    return max(float(np.mean(np.abs(z) ** 2 / sigma2_v[None, :])) - 1.0, 1e-12)


def snr_for_phase_accuracy(phase_accuracy_deg: float) -> float:
    """The (integrated) SNR at which a phase is known to `phase_accuracy_deg` rms: 1 / (2 sigma^2),
    the inverse of sigma = 1 / sqrt(2 SNR) (Rife and Boorstyn 1974; Kay 1993)."""
    return 1.0 / (2.0 * math.radians(phase_accuracy_deg) ** 2)


def noise_only_level(n_samples: int, n_cells: int, false_alarm: float = DETECTION_FALSE_ALARM) -> float:
    """The mean of |z|^2 / sigma^2 over `n_samples` complex noise samples (a Gamma(n, 1) / n variable:
    the sum of n unit exponentials; common practice) that the largest of `n_cells` independent such cells
    exceeds with probability `false_alarm`: each cell's exceedance 1 - (1 - false_alarm)^(1 / n_cells)."""
    from scipy.special import gammainccinv  # scipy: load on use
    per_cell = -math.expm1(math.log1p(-false_alarm) / n_cells)
    return float(gammainccinv(n_samples, per_cell)) / n_samples


def snr_estimate_sd(snr: float, n_samples: int) -> float:
    """Standard deviation of the SNR estimate mean(|z|^2 / sigma^2) - 1 over n_samples samples of a
    constant signal of SNR `snr` in complex Gaussian noise: var |s + n|^2 = sigma^4 (1 + 2 snr) (a
    non-central chi-square with 2 degrees of freedom; common practice), so sqrt((1 + 2 snr) / n)."""
    return math.sqrt((1.0 + 2.0 * max(snr, 0.0)) / n_samples)


def trihedral_edge_m(rcs_dbsm: float, wavelength_m: float) -> float:
    """Edge length of the triangular trihedral corner reflector of peak RCS `rcs_dbsm`: sigma =
    4 pi a^4 / (3 lambda^2) (Knott, Shaeffer and Tuley, "Radar Cross Section", 2004; common practice)."""
    return (3.0 * wavelength_m ** 2 * 10.0 ** (rcs_dbsm / 10.0) / (4.0 * math.pi)) ** 0.25


@dataclass
class ReflectorEvidence:
    """What the estimation measured about the reflector's cell, for reflector_refusals."""

    level: float  # mean |z|^2 / sigma^2 over the cell's F x V samples (1 = noise alone)
    n_frames: int
    n_virtual: int
    n_cells: int  # range cells searched
    is_peak: bool  # the cell is a local maximum of the zero-Doppler column
    range_m: float  # the cell's range
    target_range_m: float  # the given place
    azimuth_deg: float
    elevation_deg: float
    search_m: float  # half-width of the searched range interval
    unit_cell_snr: float  # per-channel cell SNR a 0 dBsm reflector at the given place has (link budget)
    wavelength_m: float
    others: list[tuple[float, float]]  # (range m, integrated SNR dB) of strong enough echoes elsewhere

    @property
    def snr(self) -> float:
        return max(self.level - 1.0, 1e-12)

    @property
    def n_samples(self) -> int:
        return self.n_frames * self.n_virtual


def zero_doppler_echoes(column_level: np.ndarray, n_frames: int, skip: tuple[int, int], first_cell: int,
                        bin_m: float) -> list[tuple[float, float]]:
    """Echoes of the zero-Doppler column (`column_level`: per-channel level over the noise of each range
    cell, 1 = noise) strong enough to calibrate with: local maxima from `first_cell` on, outside the
    cells skip[0]..skip[1], whose integrated SNR F (level - 1) reaches MIN_INTEGRATED_SNR_DB. (range m,
    integrated SNR dB), strongest first."""
    need = 10.0 ** (MIN_INTEGRATED_SNR_DB / 10.0)
    out = []
    for r in _local_maxima(column_level):
        if r < first_cell or skip[0] <= r <= skip[1]:
            continue
        integrated = n_frames * (column_level[r] - 1.0)
        if integrated >= need:
            out.append((r * bin_m, db(integrated)))
    return sorted(out, key=lambda e: -e[1])


def _elsewhere(ev: ReflectorEvidence) -> str:
    if not ev.others:
        return "no zero-Doppler echo elsewhere in the capture is strong enough either"
    r, snr_db = ev.others[0]
    return f"or give --target-range-m {r:.2f} for the reflector seen at {r:.2f} m ({snr_db:.1f} dB integrated)"


def reflector_refusals(ev: ReflectorEvidence) -> list[str]:
    """Why the capture cannot give a calibration to PHASE_ACCURACY_DEG (none if it can), each with what
    would make it usable (module docstring)."""
    need = snr_for_phase_accuracy(PHASE_ACCURACY_DEG)
    f, n = ev.n_frames, ev.n_samples
    noise_level = noise_only_level(n, ev.n_cells)
    rule = (f"a calibration to {PHASE_ACCURACY_DEG:g} deg rms per channel needs {MIN_INTEGRATED_SNR_DB:.1f} dB "
            f"per-channel SNR integrated over the frames (1 / sqrt(2 SNR))")
    if not ev.is_peak or ev.level <= noise_level:
        what = ("is on the slope of an echo outside them, no peak" if not ev.is_peak else
                f"is {db(ev.level):+.1f} dB over the noise per channel and frame (noise alone reaches "
                f"{db(noise_level):+.1f} dB in these {ev.n_cells} cells over {f} frames)")
        rcs = db(need / (f * ev.unit_cell_snr))
        return [f"no reflector within +-{ev.search_m:.2f} m of {ev.target_range_m:g} m: the strongest "
                f"zero-Doppler cell there, at {ev.range_m:.2f} m, {what}; {rule}; put a corner reflector at "
                f"{ev.target_range_m:g} m, azimuth {ev.azimuth_deg:+.1f} deg, elevation {ev.elevation_deg:+.1f} "
                f"deg (by the sensor description's link budget at least {rcs:.1f} dBsm for {f} frames: a "
                f"triangular trihedral of {trihedral_edge_m(rcs, ev.wavelength_m) * 1e3:.0f} mm edges), "
                f"{_elsewhere(ev)}"]
    integrated = f * ev.snr
    if integrated >= need:
        return []
    low = max(ev.snr - ESTIMATE_SIGMAS * snr_estimate_sd(ev.snr, n), ev.snr / 2.0)  # cautious advice
    short_db = db(need / (f * low))
    return [f"reflector too weak: at {ev.range_m:.2f} m its per-channel SNR is {db(ev.snr):.1f} dB per frame, "
            f"{db(integrated):.1f} dB over {f} frames; {rule}; record at least {math.ceil(need / low)} frames, "
            f"or use a reflector {short_db:.1f} dB larger (a trihedral with {10.0 ** (short_db / 40.0):.2f} x "
            f"longer edges), or bring it to {ev.range_m * 10.0 ** (-short_db / 40.0):.2f} m (the SNR grows as "
            f"1 / R^4); {_elsewhere(ev)}"]


def near_limit(sensor: Sensor, r0: float) -> tuple[float, float, list[str]]:
    """(far-field distance 2 D^2 / lambda of the virtual aperture, the near limit max(far field,
    NEAR_RANGE_CELLS range cells), the warning when the reflector is nearer)."""
    aperture = _virtual_aperture_m(sensor)
    far_field_m = 2.0 * aperture ** 2 / sensor.wavelength_m
    near_limit_m = max(far_field_m, NEAR_RANGE_CELLS * sensor.range_resolution_m)
    if r0 >= near_limit_m:
        return far_field_m, near_limit_m, []
    return far_field_m, near_limit_m, [
        f"reflector too near: {r0:.3f} m is inside {near_limit_m:.3f} m = max(2 D^2 / lambda = "
        f"{far_field_m:.3f} m with D = {aperture * 1e3:.1f} mm the virtual aperture, {NEAR_RANGE_CELLS} range "
        f"cells = {NEAR_RANGE_CELLS * sensor.range_resolution_m:.3f} m); move it further away"]


def other_peak_warnings(mean_map: np.ndarray, rb: int, c0: int, floor: float, bin_m: float,
                         vel_per_col: float) -> list[str]:
    """Other local maxima of the range-Doppler map within NEIGHBOUR_CELLS of the reflector's cell
    (rb, c0), at most NEIGHBOUR_LEVEL_DB below it and NEIGHBOUR_NOISE_MARGIN_DB above the noise `floor`."""
    n_range, n_dop = mean_map.shape
    p_ref = mean_map[rb, c0]
    r_a, r_b = max(0, rb - NEIGHBOUR_CELLS), min(n_range, rb + NEIGHBOUR_CELLS + 1)
    d_a, d_b = max(0, c0 - NEIGHBOUR_CELLS), min(n_dop, c0 + NEIGHBOUR_CELLS + 1)
    level = max(p_ref * 10.0 ** (NEIGHBOUR_LEVEL_DB / 10.0), floor * 10.0 ** (NEIGHBOUR_NOISE_MARGIN_DB / 10.0))
    warnings = []
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
                f"{db(v / p_ref):.1f} dB re the reflector (limit: nothing within {NEIGHBOUR_CELLS} range and "
                f"Doppler cells above {NEIGHBOUR_LEVEL_DB:.0f} dB); clear the area around the reflector")
    return warnings


def not_static_warnings(row: np.ndarray, c0: int, range_m: float) -> list[str]:
    """The reflector's range row of the map must peak at zero Doppler (column c0)."""
    if row[c0 - 1] > row[c0] or row[(c0 + 1) % len(row)] > row[c0]:
        return [f"reflector not static: at {range_m:.2f} m the Doppler maximum is not at zero velocity; "
                f"the calibration assumes a still reflector and sensor"]
    return []


def channel_gain_warnings(gain: np.ndarray, n_rx: int) -> list[str]:
    """Channels whose gain is more than CHANNEL_GAIN_LIMIT_DB from the mean amplitude."""
    gain_db = 20.0 * np.log10(np.abs(gain))
    return [f"channel {v} (TX {v // n_rx}, RX {v % n_rx}) gain {gain_db[v]:+.1f} dB re the mean, beyond "
            f"+-{CHANNEL_GAIN_LIMIT_DB:.0f} dB: a dead, unplugged or saturated channel? its correction "
            f"{-gain_db[v]:+.1f} dB also scales its noise"
            for v in np.flatnonzero(np.abs(gain_db) > CHANNEL_GAIN_LIMIT_DB)]


def neighbour_misfit(beside: tuple[np.ndarray, np.ndarray], common: np.ndarray, gain: np.ndarray,
                     ideal: np.ndarray, sigma2_v: np.ndarray) -> tuple[float, float, list[str]]:
    """The calibrated range cells beside the reflector (`beside`: the frames' snapshots [F, V] of the
    cell before and after it; `ideal` [3, V] the ideal snapshots of the cell before, at and after):
    do they fit one point in the known direction? (misfit of the worse one in dB, what noise alone
    gives, warning)."""
    misfits, expected = [], []
    n_virt = len(gain)
    for side, zb in ((0, beside[0]), (2, beside[1])):
        n_frames = zb.shape[0]
        y = (zb * common[:, None]).mean(axis=0) / gain
        a = ideal[side]
        fit = abs(np.vdot(a, y)) ** 2 / (np.vdot(y, y).real * np.vdot(a, a).real)
        misfits.append(max(1.0 - fit, 1e-16))
        # noise alone leaves (V - 1) / V of its power outside the fitted direction: misfit 1 / (V rho F) x (V - 1)
        rho_b = cell_snr(zb, sigma2_v)
        expected.append((n_virt - 1) / n_virt / (rho_b * n_frames))
    worst = int(np.argmax(misfits))
    neighbour_misfit_db = db(misfits[worst])
    expected_misfit_db = db(expected[worst])
    warnings = []
    if neighbour_misfit_db > MISFIT_LIMIT_DB and misfits[worst] > 10.0 * expected[worst]:
        warnings.append(
            f"reflector not alone: after calibration the range cell {'before' if worst == 0 else 'after'} the "
            f"reflector fits one point in the given direction only to {neighbour_misfit_db:.1f} dB (limit "
            f"{MISFIT_LIMIT_DB:.0f} dB, noise alone gives {expected_misfit_db:.1f} dB): a second scatterer close "
            f"in range")
    return neighbour_misfit_db, expected_misfit_db, warnings


def _main_lobe(beam: np.ndarray, i0: int) -> tuple[int, int]:
    """First and last index of the main lobe of `beam` around index i0: up to its peak, then down to
    the nearest minima either side."""
    pk = i0
    while 0 < pk < len(beam) - 1 and max(beam[pk - 1], beam[pk + 1]) > beam[pk]:
        pk += 1 if beam[pk + 1] > beam[pk - 1] else -1
    a_i = pk
    while a_i > 0 and beam[a_i - 1] < beam[a_i]:
        a_i -= 1
    b_i = pk
    while b_i < len(beam) - 1 and beam[b_i + 1] < beam[b_i]:
        b_i += 1
    return a_i, b_i


def _peak_sidelobe_db(beam: np.ndarray, outside: np.ndarray, a_i: int, b_i: int) -> float:
    """The strongest local maximum outside the main lobe a_i..b_i, relative to the main lobe's peak."""
    mx = _local_maxima(beam)
    mx = mx[outside[mx]]
    main = beam[a_i: b_i + 1].max()
    return db(beam[mx].max() / main) if mx.size else -math.inf


def azimuth_beams(sensor: Sensor, ideal_cell: np.ndarray, z_mean: np.ndarray, gain: np.ndarray,
                   az0: float, el0: float) -> tuple[float, float, list[str]]:
    """Azimuth beams (rect weights, at the given elevation) of the frames' mean snapshot: peak sidelobe
    uncalibrated and calibrated, and a warning for a second uncalibrated peak outside the main lobe
    where a lone reflector's beam is low. NaN sidelobes without an azimuth aperture."""
    pos_v = sensor.virtual_positions_m
    lam = sensor.wavelength_m
    w0 = math.sin(math.radians(el0))
    u0 = math.sin(math.radians(az0)) * math.cos(math.radians(el0))
    if not np.ptp(pos_v[:, 0]) > 0:
        return math.nan, math.nan, []
    u = np.linspace(-1.0, 1.0, 4001)
    b_ideal = _beam_u(ideal_cell, pos_v, lam, w0, u)
    b_meas = _beam_u(z_mean, pos_v, lam, w0, u)
    b_cal = _beam_u(z_mean / gain, pos_v, lam, w0, u)
    # main lobe of a lone reflector: from its peak down to the nearest minima either side
    a_i, b_i = _main_lobe(b_ideal, int(np.argmin(np.abs(u - u0))))
    outside = np.ones(len(u), bool)
    outside[a_i: b_i + 1] = False
    ideal_rel = b_ideal / b_ideal.max()
    psl_unc = _peak_sidelobe_db(b_meas, outside, a_i, b_i)
    psl_cal = _peak_sidelobe_db(b_cal, outside, a_i, b_i)
    main = b_meas[a_i: b_i + 1].max()
    thr = 10.0 ** (SECOND_ANGLE_PEAK_DB / 10.0)
    warnings = []
    for m in _local_maxima(b_meas):
        if outside[m] and b_meas[m] >= thr * main and ideal_rel[m] < thr:
            az_m = math.degrees(math.asin(float(np.clip(u[m] / max(math.cos(math.radians(el0)), 1e-9), -1, 1))))
            warnings.append(
                f"second angle peak: the uncalibrated azimuth beam has a peak at {az_m:.1f} deg only "
                f"{db(b_meas[m] / main):.1f} dB below the main one (limit {SECOND_ANGLE_PEAK_DB:.0f} dB): a "
                f"second reflector at the same range or multipath would spoil the calibration (channel "
                f"errors far above 45 deg rms can also cause this)")
    return psl_unc, psl_cal, warnings


def clipping_warnings(clipped: int, full_scale: float) -> list[str]:
    if not clipped:
        return []
    return [f"ADC clipping: {clipped} samples at full scale ({full_scale:g}); the clipped "
            f"channels' gains are wrong: reduce the reflector's size or move it further away"]
