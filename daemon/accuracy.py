"""Monte Carlo accuracy of the chain: simulated frames of one point target, against the Cramér-Rao bounds.

Each trial draws one target at a random off-grid range, radial velocity, azimuth and elevation,
simulates its noise-free frame once with the exact-distance signal model (simulate.py) at a
per-sample SNR of 0 dB, draws one noise frame, and then, for every integrated SNR asked for,
scales the signal, adds that trial's noise and runs the Pipeline. The point nearest the truth is
matched; its errors, its reported sigmas and the bounds at the truth are collected per SNR. The
same noise serves every SNR of a trial (common random numbers: each SNR's statistics are those of
independent trials; the rows are correlated with each other, which makes their comparison sharper).

SNR. The integrated SNR is the SNR of the coherent sum over the whole cube: per-sample SNR eta
(|a|^2 / sigma^2 on one channel, sigma^2 the complex noise power) times N samples times M loops
times K virtual channels. For TDM this is the energy of every sample of the frame over the noise
power. The bounds below use the raw eta, never the SNR after the chain's windows.

Bounds (written from the papers, independently of the chain's bounds module):
  - Range and velocity: a complex tone of N samples in white noise, per-sample SNR eta, has
    var(omega) >= 6 / (eta N (N^2 - 1)) rad^2 per sample^2 (Rife and Boorstyn, "Single-tone
    parameter estimation from discrete-time observations", IEEE Trans. IT, 1974). L independent
    looks at the same frequency (each with its own amplitude and phase) add their Fisher
    information, so var(omega) >= 6 / (eta L N (N^2 - 1)). Range: N = samples per chirp, L = loops
    x virtual channels, omega = 2 pi S (2 R / c) / fs, so sigma_R = sigma_omega c fs / (4 pi S).
    Velocity: N = loops, L = samples x virtual channels, omega = 2 pi (2 v / lambda) T_loop, so
    sigma_v = sigma_omega lambda / (4 pi T_loop).
  - Azimuth and elevation: the deterministic (conditional) CRB of Stoica and Nehorai ("MUSIC,
    maximum likelihood, and Cramér-Rao bound", IEEE Trans. ASSP, 1989) for one source and one
    snapshot: CRB = (sigma^2 / 2) [Re{(D^H P_a^perp D) o P^T}]^-1 with P = |s|^2, i.e.
    CRB(theta) = [2 eta_e Re(D^H P_a^perp D)]^-1, where a(theta) is the steering vector of the
    virtual array, D = [da/daz, da/del] its derivatives (both direction parameters of the one
    source), P_a^perp = I - a a^H / (a^H a), and eta_e = eta N M the raw energy per virtual
    element over the noise power (the snapshot is the coherent sum of N samples and M loops).

TDM sensors with complex sampling only (the tone bound above is the complex one; for BPM the
per-element energy and the loops' SNR differ).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

from .errors import CubecastError
from .scene import Scene, Target, polar_to_cartesian
from .sensor import SPEED_OF_LIGHT_MPS, Sensor
from .settings import ProcessingSettings
from .simulate import TRUTH_COLUMNS, Simulator

log = logging.getLogger(__name__)

SNR_DB = (10.0, 20.0, 30.0, 40.0, 50.0)  # integrated SNR of the bench
COORDINATES = ("range", "velocity", "azimuth", "elevation")
# coordinate -> (point field, sigma field, unit)
FIELDS = {
    "range": ("range_m", "sigma_range_m", "m"),
    "velocity": ("velocity_mps", "sigma_velocity_mps", "m/s"),
    "azimuth": ("azimuth_deg", "sigma_azimuth_deg", "deg"),
    "elevation": ("elevation_deg", "sigma_elevation_deg", "deg"),
}
SNR_DEFINITION = ("integrated SNR = per-sample SNR x samples x loops x virtual channels (the SNR of the coherent "
                  "sum over the whole cube); bounds from the raw per-sample SNR: range and velocity Rife and "
                  "Boorstyn 1974, angles Stoica and Nehorai 1989 with per-element SNR = per-sample SNR x samples "
                  "x loops")
GATE_CELLS = 2.0  # a match within 2 range and 2 velocity resolution cells ...
GATE_BEAMWIDTHS = 1.0  # ... and one Rayleigh beamwidth in azimuth (sine space) counts as a detection


# --------------------------------------------------------------------------------------------
# bounds
# --------------------------------------------------------------------------------------------


def tone_frequency_crb_rad(snr, n_samples: int, n_looks: float = 1.0):
    """Cramér-Rao standard deviation of a complex tone's frequency in rad per sample: N samples of
    per-sample SNR snr (linear, |a|^2 / sigma^2), n_looks independent looks at the same frequency:
    sqrt(6 / (snr L N (N^2 - 1))) (Rife and Boorstyn 1974)."""
    n = float(n_samples)
    return np.sqrt(6.0 / (np.asarray(snr, np.float64) * n_looks * n * (n * n - 1.0)))


def range_crb_m(sensor: Sensor, snr_per_sample):
    """Range bound: the tone over the samples of a chirp, loops x virtual channels looks."""
    sigma_w = tone_frequency_crb_rad(snr_per_sample, sensor.samples_per_chirp, sensor.n_loops * sensor.n_virtual)
    return sigma_w * SPEED_OF_LIGHT_MPS * sensor.sample_rate_hz / (4.0 * math.pi * sensor.slope_hz_per_s)


def velocity_crb_mps(sensor: Sensor, snr_per_sample):
    """Radial velocity bound: the tone over the loops, samples x virtual channels looks."""
    sigma_w = tone_frequency_crb_rad(snr_per_sample, sensor.n_loops, sensor.samples_per_chirp * sensor.n_virtual)
    return sigma_w * sensor.wavelength_m / (4.0 * math.pi * sensor.loop_period_s)


def _direction(az: float, el: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit vector of (az, el) in the sensor frame and its derivatives by az and by el."""
    ca, sa, ce, se = math.cos(az), math.sin(az), math.cos(el), math.sin(el)
    return (np.array([ce * sa, ce * ca, se]), np.array([ce * ca, -ce * sa, 0.0]),
            np.array([-se * sa, -se * ca, ce]))


def direction_crb_deg(positions_m: np.ndarray, wavelength_m: float, element_snr: float, azimuth_deg: float,
                      elevation_deg: float = 0.0, elevation: bool = True) -> tuple[float, float]:
    """(sigma_azimuth, sigma_elevation) in degrees: the deterministic single-snapshot CRB of one
    source (Stoica and Nehorai 1989), CRB = [2 eta_e Re(D^H P_a^perp D)]^-1, with the virtual
    element positions [K, 3] (two-way phase centres), eta_e the SNR per element of the snapshot and
    D the derivatives of the steering vector a_k = exp(j 2 pi / lambda p_k . r(az, el)). With
    elevation=False only the azimuth is a parameter (sigma_elevation is nan)."""
    pos = np.asarray(positions_m, np.float64)
    k0 = 2.0 * math.pi / wavelength_m
    r, dr_az, dr_el = _direction(math.radians(azimuth_deg), math.radians(elevation_deg))
    a = np.exp(1j * k0 * (pos @ r))
    d = 1j * k0 * np.stack([pos @ dr_az, pos @ dr_el], axis=1) * a[:, None]  # [K, 2]
    if not elevation:
        d = d[:, :1]
    proj = np.eye(len(a)) - np.outer(a, a.conj()) / np.vdot(a, a).real
    fisher = 2.0 * element_snr * np.real(d.conj().T @ proj @ d)
    crb = np.linalg.inv(fisher)
    sig = np.degrees(np.sqrt(np.diag(crb)))
    return float(sig[0]), (float(sig[1]) if elevation else math.nan)


def per_sample_snr(sensor: Sensor, integrated_snr_db: float) -> float:
    """Linear per-sample SNR for an integrated SNR (dB) over samples x loops x virtual channels."""
    cells = sensor.samples_per_chirp * sensor.n_loops * sensor.n_virtual
    return 10.0 ** (integrated_snr_db / 10.0) / cells


def has_elevation(sensor: Sensor) -> bool:
    """True when the virtual array has extent in z (it can measure elevation)."""
    return float(np.ptp(sensor.virtual_positions_m[:, 2])) > 1e-6 * sensor.wavelength_m


# --------------------------------------------------------------------------------------------
# trials
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Draws:
    """Where the random targets are drawn (uniformly): range, radial velocity (within the
    unambiguous interval, clear of its edges), azimuth, elevation (0 without elevation extent)."""

    range_m: tuple[float, float]
    velocity_mps: tuple[float, float]
    azimuth_deg: tuple[float, float] = (-60.0, 60.0)
    elevation_deg: tuple[float, float] = (-15.0, 15.0)

    @classmethod
    def for_sensor(cls, sensor: Sensor, settings: ProcessingSettings) -> "Draws":
        """Range from 16 range cells above min_range_m (or 10 % of the maximum) to 85 % of the
        maximum (clear of the CFAR window's edges); velocity within 75 % of +- the unambiguous
        velocity; elevation +-15 deg where the array has elevation extent."""
        r_max = settings.max_range_m or sensor.max_range_m
        lo = max(settings.min_range_m + 16.0 * sensor.range_resolution_m, 0.1 * r_max)
        v = 0.75 * sensor.max_velocity_mps
        el = (-15.0, 15.0) if has_elevation(sensor) else (0.0, 0.0)
        return cls((lo, 0.85 * r_max), (-v, v), (-60.0, 60.0), el)

    def sample(self, rng: np.random.Generator) -> tuple[float, float, float, float]:
        return tuple(float(rng.uniform(*span)) for span in
                     (self.range_m, self.velocity_mps, self.azimuth_deg, self.elevation_deg))


def unit_frame(sensor: Sensor, range_m: float, velocity_mps: float, azimuth_deg: float,
               elevation_deg: float) -> tuple[np.ndarray, dict]:
    """The noise-free frame (complex64) of one target at per-sample SNR 0 dB (an explicit scene
    SNR), moving along its line of sight, and its truth at the frame's measurement epoch."""
    pos = polar_to_cartesian(range_m, azimuth_deg, elevation_deg)
    target = Target("trial", pos, pos / range_m * velocity_mps, 0.0, 0.0)
    sim = Simulator(sensor, Scene("accuracy trial", "", (target,)), noise=False)
    row = sim.truth(0)[0]
    truth = {name: float(row[TRUTH_COLUMNS.index(name)])
             for name in ("range_m", "velocity_mps", "azimuth_deg", "elevation_deg")}
    return sim.clean_frame(0).astype(np.complex64), truth


class _Matcher:
    """Nearest point to the truth in resolution units: range and velocity cells, and sine-space
    Rayleigh beamwidths lambda / (aperture + lambda / 2) in azimuth and elevation."""

    def __init__(self, sensor: Sensor):
        pos, lam = sensor.virtual_positions_m, sensor.wavelength_m
        self.cell_r, self.cell_v = sensor.range_resolution_m, sensor.velocity_resolution_mps
        self.beam_u = lam / (float(np.ptp(pos[:, 0])) + lam / 2.0)
        self.beam_w = lam / (float(np.ptp(pos[:, 2])) + lam / 2.0)

    def __call__(self, points: np.ndarray, truth: dict) -> int:
        """Index of the matched point, or -1 when no point lies inside the gate."""
        if len(points) == 0:
            return -1
        az, el = np.radians(points["azimuth_deg"]), np.radians(points["elevation_deg"])
        taz, tel = math.radians(truth["azimuth_deg"]), math.radians(truth["elevation_deg"])
        dr = (points["range_m"] - truth["range_m"]) / self.cell_r
        dv = (points["velocity_mps"] - truth["velocity_mps"]) / self.cell_v
        du = (np.cos(el) * np.sin(az) - math.cos(tel) * math.sin(taz)) / self.beam_u
        dw = (np.sin(el) - math.sin(tel)) / self.beam_w
        k = int(np.argmin(dr * dr + dv * dv + du * du + dw * dw))
        inside = abs(dr[k]) <= GATE_CELLS and abs(dv[k]) <= GATE_CELLS and abs(du[k]) <= GATE_BEAMWIDTHS
        return k if inside else -1


class _Tally:
    """Errors, sigmas and angle bounds of the matched points, [n_snr, n_trials] per coordinate."""

    def __init__(self, n_snr: int, n_trials: int):
        shape = (n_snr, n_trials)
        self.detected = np.zeros(shape, bool)
        self.points = np.zeros(shape, np.int64)
        self.error = {c: np.full(shape, np.nan) for c in COORDINATES}
        self.sigma = {c: np.full(shape, np.nan) for c in COORDINATES}
        self.crb = {c: np.full(shape, np.nan) for c in COORDINATES}
        self.truth = {FIELDS[c][0]: np.full(n_trials, np.nan) for c in COORDINATES}

    def add(self, i: int, t: int, points: np.ndarray, k: int, truth: dict, crb: dict) -> None:
        self.points[i, t] = len(points)
        for field, value in self.truth.items():
            value[t] = truth[field]
        for c in COORDINATES:
            self.crb[c][i, t] = crb[c]
        if k < 0:
            return
        self.detected[i, t] = True
        for c in COORDINATES:
            field, sigma_field, _ = FIELDS[c]
            self.error[c][i, t] = float(points[field][k]) - truth[field]
            self.sigma[c][i, t] = float(points[sigma_field][k])


def _rms(x: np.ndarray) -> float | None:
    return float(np.sqrt(np.mean(np.square(x)))) if x.size else None


def _ratio(a: float | None, b: float | None) -> float | None:
    return a / b if a is not None and b not in (None, 0.0) and math.isfinite(b) else None


def _summary(tally: _Tally, i: int, snr_db: float, sensor: Sensor, elevation: bool, per_trial: bool) -> dict:
    """One SNR's row: detection rate and, per coordinate over the detected trials, RMSE, RMS of the
    bound at the truth, RMS of the reported sigma, bias, and their ratios. With per_trial, also
    row["per_trial"]: the truth, the detected flags and per coordinate the error, reported sigma
    and bound of every trial (numpy arrays, nan where missed)."""
    det = tally.detected[i]
    eta = per_sample_snr(sensor, snr_db)
    row = {"snr_db": snr_db, "snr_per_sample_db": 10.0 * math.log10(eta),
           "snr_per_element_db": 10.0 * math.log10(eta * sensor.samples_per_chirp * sensor.n_loops),
           "trials": int(det.size), "detected": int(det.sum()), "detection_rate": float(det.mean()),
           "points_per_frame": float(tally.points[i].mean())}
    for c in COORDINATES:
        unit = FIELDS[c][2]
        if c == "elevation" and not elevation:
            row[c] = None
            continue
        err, sig, crb = tally.error[c][i, det], tally.sigma[c][i, det], tally.crb[c][i, det]
        rmse, rms_crb, rms_sig = _rms(err), _rms(crb), _rms(sig)
        bias = float(err.mean()) if err.size else None
        row[c] = {"unit": unit, "rmse": rmse, "crb": rms_crb, "sigma": rms_sig, "bias": bias,
                  "rmse_over_crb": _ratio(rmse, rms_crb), "rmse_over_sigma": _ratio(rmse, rms_sig),
                  "bias_over_crb": _ratio(bias, rms_crb)}
    if per_trial:
        row["per_trial"] = {"truth": {f: v.copy() for f, v in tally.truth.items()}, "detected": det.copy(),
                            **{c: {"error": tally.error[c][i].copy(), "sigma": tally.sigma[c][i].copy(),
                                   "crb": tally.crb[c][i].copy()} for c in COORDINATES}}
    return row


def _check(sensor: Sensor, n_trials: int) -> None:
    if sensor.mimo_scheme != "tdm" or not sensor.adc.is_complex:
        raise CubecastError(f"sensor '{sensor.sensor_id}': the accuracy bench needs a TDM sensor with complex "
                            f"sampling (this one is {sensor.mimo_scheme.upper()}, {sensor.adc.sampling} sampling)")
    if n_trials < 1:
        raise CubecastError(f"trials = {n_trials}: at least 1")


def sweep(sensor: Sensor, settings: ProcessingSettings | None = None, snrs_db=SNR_DB, n_trials: int = 100,
          seed: int = 0, draws: Draws | None = None, progress: bool = False, desc: str | None = None,
          per_trial: bool = False) -> list[dict]:
    """Monte Carlo over n_trials random targets at each integrated SNR in snrs_db (dB): one row per
    SNR (see _summary). Trial t draws its target from PCG64([seed, 0, t]) and its noise from
    PCG64([seed, 1, t]), so a trial is the same whichever SNRs are asked for. Draws with equal
    ends (lo == hi) fix a coordinate: one target geometry under fresh noise per trial."""
    from .chain.pipeline import Pipeline

    _check(sensor, n_trials)
    settings = (settings or ProcessingSettings()).validate()
    draws = draws or Draws.for_sensor(sensor, settings)
    pipe = Pipeline(sensor, settings)
    match = _Matcher(sensor)
    elevation = has_elevation(sensor)
    snrs_db = [float(s) for s in snrs_db]
    etas = [per_sample_snr(sensor, s) for s in snrs_db]
    n_elem = sensor.samples_per_chirp * sensor.n_loops
    crb_r = [float(range_crb_m(sensor, e)) for e in etas]
    crb_v = [float(velocity_crb_mps(sensor, e)) for e in etas]
    tally = _Tally(len(snrs_db), n_trials)
    noise_std = np.float32(sensor.noise_rms_counts / math.sqrt(2.0))
    trials = range(n_trials)
    if progress:
        from tqdm import tqdm
        trials = tqdm(trials, desc=desc or f"accuracy {sensor.sensor_id}", unit="trial")
    frame = None
    for t in trials:
        geometry = draws.sample(np.random.Generator(np.random.PCG64([seed, 0, t])))
        clean, truth = unit_frame(sensor, *geometry)
        rng = np.random.Generator(np.random.PCG64([seed, 1, t]))
        noise = rng.standard_normal(clean.shape + (2,), dtype=np.float32).view(np.complex64)[..., 0]
        noise *= noise_std
        frame = np.empty_like(clean) if frame is None else frame
        for i, eta in enumerate(etas):
            np.multiply(clean, np.float32(math.sqrt(eta)), out=frame)
            frame += noise
            points = pipe.process(frame)
            s_az, s_el = direction_crb_deg(sensor.virtual_positions_m, sensor.wavelength_m, eta * n_elem,
                                           truth["azimuth_deg"], truth["elevation_deg"], elevation)
            crb = {"range": crb_r[i], "velocity": crb_v[i], "azimuth": s_az, "elevation": s_el}
            tally.add(i, t, points, match(points, truth), truth, crb)
    return [_summary(tally, i, s, sensor, elevation, per_trial) for i, s in enumerate(snrs_db)]


def run_trials(sensor: Sensor, settings: ProcessingSettings | None, snr_db: float, n_trials: int,
               seed: int = 0, draws: Draws | None = None, per_trial: bool = False) -> dict:
    """One integrated SNR (dB): the row of `sweep` for it."""
    return sweep(sensor, settings, (snr_db,), n_trials, seed, draws, per_trial=per_trial)[0]
