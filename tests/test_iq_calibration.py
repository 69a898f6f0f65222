"""I/Q imbalance: the blind estimate of `cubecast calibrate` (daemon/calibiq.py), its table in the
calibration file (calibfile.py), the correction in the chain, and the table's way into every chain that
process and serve build (with and without workers).

The captures are simulated with the scene's [impairments] iq_gain_db / iq_phase_deg (daemon/simulate.py):
per RX, I' = I, Q' = g (Q cos phi - I sin phi), g = 10^(iq_gain_db / 20), applied to echo and noise
alike, then a DC offset. Sources of the checks, each written out here and not taken from the package:
- the image of a tone under that imbalance: x = mu z + nu conj(z), mu = (1 + g e^{-j phi}) / 2,
  nu = (1 - g e^{j phi}) / 2, so the mirror at the negative beat frequency (and negative Doppler) has
  |nu|^2 / |mu|^2 = 1 / IRR of the echo's power, IRR = (1 + 2 g cos phi + g^2) / (1 - 2 g cos phi + g^2)
  (common practice; e.g. Razavi, RF Microelectronics, 2nd ed., 2011);
- the standard deviation of the estimates from N samples of circular Gaussian noise: the estimate of
  sin phi is minus the sample correlation coefficient of (I', Q'), whose large-sample variance is
  (1 - rho^2)^2 / N with rho = -sin phi (Fisher, Biometrika, 1915; from memory), so sd(phi) =
  cos phi / sqrt(N); log g is half the log ratio of the two sample variances, of variance
  (4 / N - 4 rho^2 / N) / 4 (delta method; common practice), so sd(g) = g cos phi / sqrt(N);
- N: the estimate removes each MIMO slot's mean over its L loops (per RX and fast-time sample), so a
  frame gives slots x samples x (L - 1) degrees of freedom per RX (a Wishart sum; common practice);
- the image left after correcting with estimates off by e = dg / g and d = dphi: composing the
  correction with the true imbalance (done below with the formulas of README "I/Q imbalance").
Tolerances are +-5 sigma of the statistic at hand, each derived where it is used.
"""

from __future__ import annotations

import dataclasses
import logging
import math

import numpy as np
import pytest

from cubecast.daemon.calibfile import load_calibration_file, load_chain_calibration
from cubecast.daemon.calibiq import estimate_iq_imbalance
from cubecast.daemon.capture import CaptureReader, CaptureWriter
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.chain.points import to_records
from cubecast.daemon.cli import main as cli_main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import capture_sensor, iter_capture_frames
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sensor import load_sensor, parse_sensor
from cubecast.daemon.settings import ProcessingSettings
from cubecast.daemon.simulate import Simulator
from tests.helpers import YARD_SENSOR
from tests.test_calibrate import calibrate_log  # noqa: F401

GAIN_DB = np.array([1.0, -0.8, 0.5, 0.0])
PHASE_DEG = np.array([4.0, -3.0, 6.0, -2.0])
TRUE_G = 10.0 ** (GAIN_DB / 20.0)
TRUE_PHI = np.radians(PHASE_DEG)
REFLECTOR_M = 5.0
FRAMES = 5  # per estimate: 5 x 3 slots x 128 samples x 31 = 59520 samples per RX
TRIALS = 100


def scene_text(impaired: bool = True, snr_db: float = 20.0, dc: bool = True) -> str:
    text = f'[[target]]\nname = "corner"\nrange_m = {REFLECTOR_M}\nsnr_db = {snr_db}\n'
    if impaired:
        text += (f"[impairments]\niq_gain_db = {GAIN_DB.tolist()}\niq_phase_deg = {PHASE_DEG.tolist()}\n"
                 + ("dc_offset_counts = [[30.0, -20.0], [0.0, 0.0], [-15.0, 5.0], [4.0, 4.0]]\n" if dc else ""))
    return text


def irr(g, phi):
    """Razavi 2011 (common practice): (1 + 2 g cos phi + g^2) / (1 - 2 g cos phi + g^2), as a power ratio."""
    return (1.0 + 2.0 * g * np.cos(phi) + g * g) / (1.0 - 2.0 * g * np.cos(phi) + g * g)


def residual_image_ratio(g, phi, g_hat, phi_hat):
    """|nu_r|^2 / |mu_r|^2 of the true imbalance (g, phi) corrected with (g_hat, phi_hat): the correction
    I = I', Q = (Q' / g_hat + I' sin phi_hat) / cos phi_hat applied to I' = I, Q' = g (Q cos phi - I sin phi),
    evaluated on z = 1 and z = j, gives y(1) = mu + nu and y(j) = j (mu - nu)."""
    def corrected(z):
        i, q = np.real(z), np.imag(z)
        qp = g * (q * np.cos(phi) - i * np.sin(phi))
        return i + 1j * (qp / g_hat + i * np.sin(phi_hat)) / np.cos(phi_hat)
    y1, yj = corrected(1.0 + 0j), corrected(1j)
    mu, nu = (y1 - 1j * yj) / 2.0, (y1 + 1j * yj) / 2.0
    return np.abs(nu) ** 2 / np.abs(mu) ** 2


def dof(sensor, frames):
    return frames * sensor.n_slots * sensor.samples_per_chirp * (sensor.n_loops - 1)


def chain_settings():
    """Default settings; fast-time interference repair off, so that the measured cells hold the echo
    and its mirror only (the repair is tested on its own)."""
    return dataclasses.replace(ProcessingSettings(), interference_mitigation="off").validate()


@pytest.fixture(scope="module")
def sensor():
    return load_sensor(YARD_SENSOR)


def frames_of(sensor, text, seed, n=FRAMES, noise=True):
    sim = Simulator(sensor, parse_scene(text), seed=seed, noise=noise)
    return [sim.frame(i) for i in range(n)]


@pytest.fixture(scope="module")
def trials(sensor):
    """TRIALS independent estimates, each over FRAMES frames of the impaired reflector scene."""
    text = scene_text()
    return [estimate_iq_imbalance(sensor, frames_of(sensor, text, seed=1000 + t)) for t in range(TRIALS)]


def zero_doppler_power(pipe, frames):
    """Per RX and range bin: |spectrum|^2 at zero Doppler summed over slots and frames, and the mean
    noise power per (RX, slot, cell) from the cells a quarter of the Doppler axis or more away from zero."""
    acc, noise = None, []
    for f in frames:
        pipe.process(f)
        spec = pipe.doppler_fft.spectrum  # [rx, slot, range, doppler]
        p = (np.abs(spec[:, :, :, 0].astype(np.complex128)) ** 2).sum(axis=1)
        acc = p if acc is None else acc + p
        n_dop = spec.shape[3]
        far = np.r_[n_dop // 4: n_dop - n_dop // 4 + 1]
        noise.append(float(np.mean(np.abs(spec[:, :, :, far].astype(np.complex128)) ** 2)))
    return acc, float(np.mean(noise))


# ---- (a) the uncorrected image ------------------------------------------------------------------

def test_uncorrected_mirror_at_the_negative_beat_frequency_at_the_irr_level(sensor):
    settings = chain_settings()
    n_fft = Pipeline(sensor, settings).range_fft.fft_size
    # noise-free: the mirror's power over the echo's is 1 / IRR per RX, to float32 rounding (each sample's
    # rounding error, relative 2^-24, leaves a cell 10 log10(N) dB above -144 dB, under -100 dB of the echo:
    # 40 dB below the weakest mirror here, so 0.1 dB is wide)
    clean, _ = zero_doppler_power(Pipeline(sensor, settings), frames_of(sensor, scene_text(), 1, n=1, noise=False))
    k = int(np.argmax(clean[:, : n_fft // 2].sum(axis=0)))
    assert abs(k * Pipeline(sensor, settings).range_fft.bin_m - REFLECTOR_M) < 0.2
    measured_db = 10.0 * np.log10(clean[:, n_fft - k] / clean[:, k])
    np.testing.assert_allclose(measured_db, -10.0 * np.log10(irr(TRUE_G, TRUE_PHI)), atol=0.1)
    # with noise: the same level within +-5 sigma. Over K slot x frame cells per RX, the mirror's summed
    # power P = sum |m + n|^2 has mean K (|m|^2 + s2) and variance K (s2^2 + 2 |m|^2 s2) (a non-central
    # chi-square with 2 degrees of freedom per cell; common practice); the echo's relative error is far smaller.
    frames = frames_of(sensor, scene_text(), 2, n=8)
    power, s2 = zero_doppler_power(Pipeline(sensor, settings), frames)
    cells = sensor.n_slots * len(frames)
    m2 = power[:, n_fft - k] / cells - s2
    t2 = power[:, k] / cells - s2
    sd = np.sqrt(cells * (s2 ** 2 + 2.0 * m2 * s2)) / cells / t2
    expected = 1.0 / irr(TRUE_G, TRUE_PHI)
    assert np.all(np.abs(m2 / t2 - expected) <= 5.0 * sd), (m2 / t2, expected, sd)
    # and the chain reports it as a point: at the mirror range, zero velocity
    pts = Pipeline(sensor, settings).process(frames[0])
    mirror_m = (n_fft - k) * Pipeline(sensor, settings).range_fft.bin_m
    assert np.any((np.abs(pts["range_m"] - mirror_m) < 0.5) & (np.abs(pts["velocity_mps"]) < 0.2)), mirror_m


# ---- (b) the estimate and its standard deviation ---------------------------------------------------

def test_estimates_within_five_sigma_of_the_truth(sensor, trials):
    n = dof(sensor, FRAMES)
    sd_phi = np.cos(TRUE_PHI) / math.sqrt(n)  # Fisher 1915, as in the module docstring
    sd_g = TRUE_G * np.cos(TRUE_PHI) / math.sqrt(n)  # delta method
    for res in trials:
        assert res.samples == n and not res.refusals and not res.warnings, (res.refusals, res.warnings)
        assert np.all(np.abs(res.gain - TRUE_G) <= 5.0 * sd_g), (res.gain, TRUE_G, sd_g)
        assert np.all(np.abs(res.phase_rad - TRUE_PHI) <= 5.0 * sd_phi), (res.phase_rad, TRUE_PHI, sd_phi)
        # the reported sigmas are that formula at the estimates: within 5 sd, cos phi moves by at most
        # tan phi x 5 sd(phi) relative, and g by 5 sd(g) / g = 5 cos phi / sqrt(N)
        cos_rtol = float(np.max(np.abs(np.tan(TRUE_PHI)) * 5.0 * sd_phi)) * 1.01
        np.testing.assert_allclose(res.phase_sd_rad, sd_phi, rtol=cos_rtol)
        np.testing.assert_allclose(res.gain_sd, sd_g, rtol=cos_rtol + 5.0 / math.sqrt(n))


def test_observed_rmse_over_reported_sigma(sensor, trials):
    # pooled over RX: TRIALS x n_rx normalised errors each for g and phi; for the true sigma the ratio
    # RMSE / sigma has sd 1 / sqrt(2 M) (M values; common practice): 0.035 for M = 400, so +-5 sd lies
    # inside 0.8..1.25
    eg = np.array([(r.gain - TRUE_G) / r.gain_sd for r in trials]).ravel()
    ep = np.array([(r.phase_rad - TRUE_PHI) / r.phase_sd_rad for r in trials]).ravel()
    for e in (eg, ep):
        ratio = math.sqrt(float(np.mean(e ** 2)))
        assert 0.8 <= ratio <= 1.25, ratio
        assert abs(ratio - 1.0) <= 5.0 / math.sqrt(2 * e.size), ratio
    # the two estimates are uncorrelated (the module's claim): |r| within 5 / sqrt(M)
    assert abs(float(np.corrcoef(eg, ep)[0, 1])) <= 5.0 / math.sqrt(eg.size)


def test_residual_image_after_correction_has_mean_one_over_2n(sensor, trials):
    # composing the true imbalance with each estimate's correction (written out above); the first-order
    # residual image ratio (e^2 + d^2) / (4 cos^2 phi) is exponential with mean 1 / (2 N): over M values
    # its mean has sd 1 / (2 N sqrt(M))
    n = dof(sensor, FRAMES)
    r = np.array([residual_image_ratio(TRUE_G, TRUE_PHI, t.gain, t.phase_rad) for t in trials]).ravel()
    assert abs(r.mean() - 1.0 / (2 * n)) <= 5.0 / (2 * n * math.sqrt(r.size)), (r.mean(), 1.0 / (2 * n))
    # and what the program reports as the expected image rejection after correction
    assert trials[0].corrected_irr_db == pytest.approx(10.0 * math.log10(2 * n), abs=1e-9)


def test_the_reported_sigma_is_conservative_with_a_moving_echo(sensor):
    # A moving echo survives the loop mean. For a deterministic circular signal of power P per sample in
    # circular noise of power s2 (P / s2 = 10 dB here), to first order S_IQ = sum (s_I n_Q + s_Q n_I) +
    # sum n_I n_Q has variance N P s2 / 2 + N s2^2 / 4 against (N (P + s2) / 2)^2, so the error is
    # sqrt((s2^2 + 2 P s2) / (P + s2)^2) = 0.417 of the noise-only sigma the program reports (derived
    # here; the echo's loop mean takes < 1 % of its power at this Doppler). Pooled over 4 RX x 60
    # trials, the observed ratio has sd 0.417 / sqrt(2 M).
    text = (f'[[target]]\nname = "cart"\nrange_m = 7.3\nradial_velocity_mps = 1.37\nsnr_db = 10.0\n'
            f"[impairments]\niq_gain_db = {GAIN_DB.tolist()}\niq_phase_deg = {PHASE_DEG.tolist()}\n")
    res = [estimate_iq_imbalance(sensor, frames_of(sensor, text, seed=2000 + t)) for t in range(60)]
    snr = 10.0
    predicted = math.sqrt((1.0 + 2.0 * snr) / (1.0 + snr) ** 2)
    for e in (np.array([(r.gain - TRUE_G) / r.gain_sd for r in res]).ravel(),
              np.array([(r.phase_rad - TRUE_PHI) / r.phase_sd_rad for r in res]).ravel()):
        ratio = math.sqrt(float(np.mean(e ** 2)))
        assert abs(ratio - predicted) <= 5.0 * predicted / math.sqrt(2 * e.size), ratio
        assert ratio < 1.0


# ---- (c) the correction in the chain ----------------------------------------------------------------

def test_chain_correction_leaves_the_predicted_residual_image_and_no_point(sensor, trials):
    settings = chain_settings()
    est = trials[0]
    table = np.column_stack([est.gain, est.phase_rad])
    corrected = Pipeline(sensor, settings, iq_imbalance=table)
    bin_m, n_fft = corrected.range_fft.bin_m, corrected.range_fft.fft_size
    k = int(round(REFLECTOR_M / bin_m))
    # noise-free, the chain is linear: the corrected impaired frame minus the ideal frame is the residual
    # image (plus (mu_r - 1) times the ideal's far sidelobe there, ~1e-3 of < -100 dB). Its power over the
    # echo's must be the composition's |nu_r|^2 / |mu_r|^2, to float32 rounding (1 % in amplitude: the
    # rounding noise sits ~45 dB under these residual images)
    ideal = Pipeline(sensor, settings)
    ideal.process(frames_of(sensor, scene_text(impaired=False), 1, n=1, noise=False)[0])
    s_ideal = ideal.doppler_fft.spectrum[:, :, :, 0].astype(np.complex128).copy()
    corrected.process(frames_of(sensor, scene_text(dc=False), 1, n=1, noise=False)[0])
    s_corr = corrected.doppler_fft.spectrum[:, :, :, 0].astype(np.complex128)
    kk = k + int(np.argmax(np.abs(s_ideal[:, :, k - 1: k + 2]).sum(axis=(0, 1)))) - 1
    image = (np.abs(s_corr[:, :, n_fft - kk] - s_ideal[:, :, n_fft - kk]) ** 2).sum(axis=1)
    echo = (np.abs(s_corr[:, :, kk]) ** 2).sum(axis=1)
    predicted = residual_image_ratio(TRUE_G, TRUE_PHI, est.gain, est.phase_rad)
    np.testing.assert_allclose(np.sqrt(image / echo), np.sqrt(predicted), rtol=0.01)
    # ... which is at or below what the reported error allows: the ratio is exponential with mean 1 / (2 N),
    # exceeded by 13.8 / (2 N) once in 1e6
    assert np.all(predicted <= 13.8 / (2 * est.samples))
    assert np.all(image / echo <= 13.8 / (2 * est.samples))
    # here 13.8 / (2 N) is -39.4 dB, below every uncorrected image (-23.4 .. -35.2 dB: irr above)
    assert np.all(13.8 / (2 * est.samples) < 1.0 / irr(TRUE_G, TRUE_PHI))
    # with noise: no point at the mirror's place (the uncorrected chain has one: test (a))
    for f in frames_of(sensor, scene_text(), 3, n=3):
        pts = corrected.process(f)
        mirror_m = (n_fft - kk) * bin_m
        assert not np.any((np.abs(pts["range_m"] - mirror_m) < 1.0) & (np.abs(pts["velocity_mps"]) < 0.5)), pts


# ---- the checks ------------------------------------------------------------------------------------

def test_too_few_samples_are_refused_with_the_frames_needed(sensor):
    res = estimate_iq_imbalance(sensor, frames_of(sensor, scene_text(), 5, n=1))
    # one frame: N = 11904, 10 log10(2 N) = 43.8 dB < 50 dB; 50 dB needs N >= 50000, i.e. 5 frames
    assert res.table is None and len(res.refusals) == 1
    assert "too few samples: 11904" in res.refusals[0] and "43.8 dB" in res.refusals[0]
    assert "at least 5 frames" in res.refusals[0]


def test_a_real_sampled_adc_has_no_iq_to_estimate(sensor):
    # real sampling covers half the band: the design range halved to fit
    real = parse_sensor(sensor.source_text.replace('sampling = "complex"', 'sampling = "real"')
                        .replace("design_max_range_m = 22.0", "design_max_range_m = 11.0"))
    res = estimate_iq_imbalance(real, iter([]))
    assert res.table is None and "no Q branch" in res.refusals[0]


def test_a_clipped_capture_is_refused_and_light_clipping_warns(sensor):
    # full scale 8191 counts: a 62 dB echo (8 counts noise) of 10000 counts has I or Q clipped where
    # |cos| > 0.82, a third of the samples
    heavy = [sensor.raw_to_canonical(sensor.canonical_to_raw(f))
             for f in frames_of(sensor, scene_text(snr_db=61.9), 6)]
    res = estimate_iq_imbalance(sensor, heavy)
    assert res.table is None and all("clipped" in r for r in res.refusals) and len(res.refusals) == 4
    # a handful of clipped samples (below 1 / sqrt(N) = 0.4 %) warn only
    frames = [f.copy() for f in frames_of(sensor, scene_text(), 6)]
    frames[0][0, 2, :3] = sensor.adc.full_scale
    res = estimate_iq_imbalance(sensor, frames)
    assert res.table is not None and any(w.startswith("rx 2: 3 samples clipped") for w in res.warnings)


def test_a_dc_level_changing_from_chirp_to_chirp_warns(sensor):
    frames = [f.copy() for f in frames_of(sensor, scene_text(), 7)]
    rng = np.random.default_rng(3)
    for f in frames:  # rx 1: a DC that jumps from chirp to chirp, 3 x the noise's rms
        f[:, 1, :] += (24.0 * rng.standard_normal(sensor.chirps_per_frame))[:, None]
    res = estimate_iq_imbalance(sensor, frames)
    assert [w for w in res.warnings if w.startswith("rx 1: a DC level that changes from chirp to chirp")]
    assert not [w for w in res.warnings if not w.startswith("rx 1")]


def test_a_fault_sized_imbalance_warns_and_a_dead_branch_is_refused(sensor):
    frames = frames_of(sensor, scene_text(impaired=False), 8)
    # Q four times too large on rx 1 (12 dB: IRR = (1 + 8 + 16) / (1 - 8 + 16) = 4.4 dB, Razavi 2011)
    big = [f.real + 1j * f.imag * np.where(np.arange(sensor.n_rx) == 1, 4.0, 1.0)[None, :, None] for f in frames]
    res = estimate_iq_imbalance(sensor, [f.astype(np.complex64) for f in big])
    assert res.table is not None and [w for w in res.warnings if w.startswith("rx 1: estimated Q gain +12.0")]
    assert len(res.warnings) == 1
    # no Q at all on rx 2
    dead = [f.copy() for f in frames]
    for f in dead:
        f[:, 2, :] = f[:, 2, :].real
    res = estimate_iq_imbalance(sensor, dead)
    assert res.table is None and res.refusals == [res.refusals[0]] and res.refusals[0].startswith("rx 2: no power in its Q")


def test_one_loop_per_frame_is_refused(sensor):
    one = parse_sensor(sensor.source_text.replace("chirps_per_frame = 96", "chirps_per_frame = 3"))
    assert one.n_loops == 1
    res = estimate_iq_imbalance(one, iter([]))
    assert res.table is None and "1 loop per frame" in res.refusals[0]


# ---- the file ---------------------------------------------------------------------------------------

def write_capture(path, sensor, text, n, seed):
    sim = Simulator(sensor, parse_scene(text), seed=seed)
    with CaptureWriter(path, sensor.source_text, metadata={"source": "test"}) as w:
        for i in range(n):
            w.write(sim.raw_frame(i), sequence=i, timestamp_s=sim.frame_time_s(i))
    return path


@pytest.fixture(scope="module")
def iq_file(tmp_path_factory, sensor):
    d = tmp_path_factory.mktemp("iqcal")
    cap = write_capture(d / "imbalanced.cap", sensor, scene_text(), 8, seed=11)
    out = d / "iq.toml"
    assert cli_main(["calibrate", str(cap), "--iq-only", "--out", str(out), "--quiet"]) == 0
    return {"capture": cap, "path": out}


def test_iq_only_file_round_trip(iq_file, sensor):
    f = load_calibration_file(iq_file["path"], sensor)
    assert f.vector is None and f.gain is None and f.range_bias_m == 0.0
    assert f.iq_imbalance.shape == (sensor.n_rx, 2) and f.iq_imbalance.dtype == np.float64
    sd = np.cos(TRUE_PHI) / math.sqrt(dof(sensor, 8))  # Fisher 1915, as above (int16 quantisation adds
    # 1/12 count^2 to the 64 of the noise: circular too)
    assert np.all(np.abs(f.iq_imbalance[:, 0] - TRUE_G) <= 5.0 * TRUE_G * sd)
    assert np.all(np.abs(f.iq_imbalance[:, 1] - TRUE_PHI) <= 5.0 * sd)
    text = iq_file["path"].read_text()
    assert text.count("[[iq_imbalance]]") == sensor.n_rx and "[[channel]]" not in text
    assert "q_gain = " in text and "q_phase_deg = " in text and "iq_corrected_image_rejection_db" in text


def test_reflector_calibration_writes_the_table_too(tmp_path, sensor):
    cap = write_capture(tmp_path / "corner.cap", sensor, scene_text(), 8, seed=12)
    out = tmp_path / "full.toml"
    assert cli_main(["calibrate", str(cap), "--target-range-m", str(REFLECTOR_M), "--out", str(out), "--quiet"]) == 0
    f = load_calibration_file(out, sensor)
    assert f.vector is not None and f.iq_imbalance is not None
    sd = np.cos(TRUE_PHI) / math.sqrt(dof(sensor, 8))
    assert np.all(np.abs(f.iq_imbalance[:, 1] - TRUE_PHI) <= 5.0 * sd)
    # --no-iq leaves it out: no correction
    out2 = tmp_path / "noiq.toml"
    assert cli_main(["calibrate", str(cap), "--target-range-m", str(REFLECTOR_M), "--out", str(out2),
                     "--quiet", "--no-iq"]) == 0
    f2 = load_calibration_file(out2, sensor)
    assert f2.iq_imbalance is None and "[[iq_imbalance]]" not in out2.read_text()
    # The reflector's cell holds mu a (its mirror is far off in range). Without the I/Q pass the channel
    # gains absorb each RX's mu = (1 + g e^{-j phi}) / 2 (Razavi 2011); with it, the array pass sees the
    # corrected frames, so they hold only the residual mu_r of the correction (composition above). Phases
    # relative to channel 0 (the file's phase reference), within +-5 sd of a difference of two channel
    # phases, each 1 / sqrt(2 F rho) (Rife and Boorstyn, IEEE Trans. IT, 1974), rho = the per-sample SNR
    # times the Hann range and Doppler coherent gains (tests/test_calibrate.py's cell_gain_db, Harris 1978)
    from tests.test_calibrate import cell_gain_db
    rho = 10.0 ** ((20.0 + cell_gain_db(sensor, REFLECTOR_M)) / 10.0)
    tol_deg = 5.0 * math.sqrt(2.0) * math.degrees(1.0 / math.sqrt(2.0 * 8 * rho))
    rx_of = np.arange(sensor.n_virtual) % sensor.n_rx
    mu = (1.0 + TRUE_G * np.exp(-1j * TRUE_PHI)) / 2.0
    g_hat, phi_hat = f.iq_imbalance[:, 0], f.iq_imbalance[:, 1]

    def mu_residual(rx):
        def corrected(z):
            i, q = np.real(z), np.imag(z)
            qp = TRUE_G[rx] * (q * np.cos(TRUE_PHI[rx]) - i * np.sin(TRUE_PHI[rx]))
            return i + 1j * (qp / g_hat[rx] + i * np.sin(phi_hat[rx])) / np.cos(phi_hat[rx])
        return (corrected(1.0 + 0j) - 1j * corrected(1j)) / 2.0
    mu_r = np.array([mu_residual(rx) for rx in range(sensor.n_rx)])
    for gains, expect in ((f2.gain, mu[rx_of]), (f.gain, mu_r[rx_of])):
        rel = np.degrees(np.angle(gains / gains[0] / (expect / expect[0])))
        assert np.all(np.abs(rel) <= tol_deg), (rel, tol_deg)
    # the two differ by far more than that: the I/Q pass matters to the array gains
    assert np.max(np.abs(np.degrees(np.angle(f.gain / f2.gain)))) > 10 * tol_deg


def test_a_file_without_the_table_means_no_correction(iq_file, sensor, tmp_path):
    text = iq_file["path"].read_text()
    head = text.split("[[iq_imbalance]]")[0]
    older = tmp_path / "older.toml"
    # an older file: [[channel]] entries, no [[iq_imbalance]]
    chans = "".join(f"\n[[channel]]\nindex = {v}\ntx = {v // sensor.n_rx}\nrx = {v % sensor.n_rx}\n"
                    f"gain_amplitude = 1.0\ngain_phase_deg = 0.0\n" for v in range(sensor.n_virtual))
    older.write_text(head + chans)
    cal = load_chain_calibration(older, sensor)
    assert cal.iq_imbalance is None and cal.vector is not None


def edited(iq_file, tmp_path, old, new, count=1):
    text = iq_file["path"].read_text()
    assert old in text
    p = tmp_path / "bad.toml"
    p.write_text(text.replace(old, new, count))
    return p


@pytest.mark.parametrize("old,new,words", [
    ("[[iq_imbalance]]\nrx = 3", "[[iq_imbalance]]\nrx = 2", ["rx", "2", "given twice"]),
    ("[[iq_imbalance]]\nrx = 3", "[[iq_imbalance]]\nrx = 4", ["rx", "4"]),
    ("q_gain = ", "q_gain = -", ["q_gain", "must be > 0"]),
    ("q_phase_deg = ", "q_phase_deg = 9", ["q_phase_deg"]),
    ("q_phase_deg = ", "q_gain_typo = 1.0\nq_phase_deg = ", ["q_gain_typo"]),
])
def test_damaged_tables_are_rejected_naming_the_field(iq_file, sensor, tmp_path, old, new, words):
    bad = edited(iq_file, tmp_path, old, new)
    with pytest.raises(CubecastError) as info:
        load_calibration_file(bad, sensor)
    msg = str(info.value)
    assert "[[iq_imbalance]]" in msg and str(bad) in msg
    for w in words:
        assert w in msg, msg


def test_wrong_count_of_rx_is_rejected(iq_file, sensor, tmp_path):
    text = iq_file["path"].read_text()
    last = text.rindex("[[iq_imbalance]]")
    report = text.index("[report]")
    p = tmp_path / "three.toml"
    p.write_text(text[:last] + text[report:])
    with pytest.raises(CubecastError, match=r"has 3 \[\[iq_imbalance\]\] entries; n_rx = 4"):
        load_calibration_file(p, sensor)


def test_phase_of_90_degrees_is_rejected(iq_file, sensor, tmp_path):
    text = iq_file["path"].read_text()
    import re
    p = tmp_path / "ninety.toml"
    p.write_text(re.sub(r"q_phase_deg = [-0-9.e]+", "q_phase_deg = 90.0", text, count=1))
    with pytest.raises(CubecastError, match=r"q_phase_deg.*90"):
        load_calibration_file(p, sensor)


def test_iq_only_refuses_reflector_flags_and_a_short_capture(tmp_path, sensor, calibrate_log):
    cap = write_capture(tmp_path / "short.cap", sensor, scene_text(), 2, seed=13)
    out = tmp_path / "x.toml"
    assert cli_main(["calibrate", str(cap), "--iq-only", "--out", str(out)]) == 2
    assert cli_main(["calibrate", str(cap), "--iq-only", "--target-range-m", "5", "--out", str(out)]) == 2
    assert cli_main(["calibrate", str(cap), "--out", str(out)]) == 2
    assert not out.exists()
    # the reflector calibration of the same short capture is written, without the table, and says why
    assert cli_main(["calibrate", str(cap), "--target-range-m", str(REFLECTOR_M), "--out", str(out), "--quiet"]) == 0
    f = load_calibration_file(out, sensor)
    assert f.vector is not None and f.iq_imbalance is None and "[[iq_imbalance]]" not in out.read_text()
    assert "iq_refused = [\"too few samples: 23808" in out.read_text()
    warned = [r.getMessage() for r in calibrate_log.records if r.levelno == logging.WARNING]
    assert any(w.startswith("cubecast calibrate: warning: no I/Q correction written: too few samples") for w in warned)


# ---- plumbing: process and serve build the same chain as Pipeline(..., iq_imbalance) -----------------

def reference_points(sensor, capture, cal, settings=None):
    """Pipeline built directly with the file's three items, on every frame of the capture."""
    pipe = Pipeline(sensor, settings, cal.vector, cal.range_bias_m, cal.iq_imbalance)
    with CaptureReader(capture) as r:
        return [to_records(pipe.process(f), seq, ts) for seq, ts, f in iter_capture_frames(r, sensor)]


def test_the_correction_changes_the_points(iq_file, sensor):
    cal = load_chain_calibration(iq_file["path"], sensor)
    with_iq = reference_points(sensor, iq_file["capture"], cal)
    without = reference_points(sensor, iq_file["capture"], dataclasses.replace(cal, iq_imbalance=None))
    assert sum(len(p) for p in with_iq) > 0
    assert any(a.tobytes() != b.tobytes() for a, b in zip(with_iq, without))


def test_process_applies_the_table(iq_file, sensor, tmp_path):
    out = tmp_path / "points.npz"
    assert cli_main(["process", str(iq_file["capture"]), "--out", str(out), "--calibration",
                     str(iq_file["path"]), "--quiet"]) == 0
    data = np.load(out)
    ref = np.concatenate(reference_points(sensor, iq_file["capture"], load_chain_calibration(iq_file["path"], sensor)))
    assert len(data["range_m"]) == len(ref) > 0
    for name in ("range_m", "velocity_mps", "azimuth_deg", "snr_db"):
        assert np.array_equal(data[name], ref[name]), name


@pytest.mark.parametrize("workers", [0, 1])
def test_serve_applies_the_table(iq_file, sensor, workers):
    from cubecast.daemon.sources import ReplaySource
    from tests.test_service import Collector, connected
    from tests.test_workers import serving
    cal = load_chain_calibration(iq_file["path"], sensor)  # what `serve --calibration` loads
    ref = reference_points(sensor, iq_file["capture"], cal)
    with CaptureReader(iq_file["capture"]) as r:
        assert capture_sensor(r).digest == sensor.digest
    src = ReplaySource(iq_file["capture"], "tcp://127.0.0.1:*", speed=None, wait_s=30)
    ep = src.bind()
    kw = dict(workers=workers) if workers else {}
    with serving_any(sensor, ep, serving, queue_depth=64, calibration=cal.vector,
                     range_bias_m=cal.range_bias_m, iq_imbalance=cal.iq_imbalance, **kw) as svc:
        col = Collector(svc.pub_endpoint)
        try:
            connected(col)
            assert src.run() == len(ref)
            assert col.wait_for(lambda c: len(c.of("points")) >= len(ref), 30)
            pts = col.of("points")
            assert [m.seq for m in pts] == list(range(len(ref)))
            for m in pts:
                assert m.data.tobytes() == ref[m.seq].tobytes(), m.seq
        finally:
            col.close()


def serving_any(sensor, ep, serving, **kw):
    """serve with workers (tests/test_workers.py's helper) or alone (a Service in a thread)."""
    if kw.get("workers"):
        return serving(sensor, ep, **kw)
    return _serving_alone(sensor, ep, **kw)


class _serving_alone:
    def __init__(self, sensor, ep, **kw):
        from cubecast.daemon.service import Service
        self.svc = Service(sensor, ep, "tcp://127.0.0.1:*", **kw)

    def __enter__(self):
        from tests.test_service import run_in_thread, wait_until
        self.t, self.stop, self.errors = run_in_thread(self.svc)
        assert wait_until(lambda: self.svc.ready.is_set() or self.errors, 60) and not self.errors, self.errors
        return self.svc

    def __exit__(self, *exc):
        self.stop.set()
        self.t.join(5)
        assert not self.t.is_alive() and not self.errors, self.errors
        return False


def test_worker_welcome_carries_the_table(sensor):
    from cubecast.daemon.workproto import ProtocolError, WorkerConfig, decode_welcome, encode_welcome
    table = np.column_stack([TRUE_G, TRUE_PHI])
    parts = [bytes(memoryview(p)) for p in encode_welcome("S1", WorkerConfig(sensor, ProcessingSettings(), None, 0.0,
                                                                             iq_imbalance=table))]
    assert len(parts) == 4
    _, cfg = decode_welcome(parts, None)
    assert cfg.iq_imbalance.tobytes() == table.tobytes()
    assert not cfg.same_as(WorkerConfig(sensor, ProcessingSettings(), None, 0.0))
    with pytest.raises(ProtocolError, match="I/Q table part is 48 bytes"):
        decode_welcome(parts[:3] + [parts[3][:48]], None)
    bad = table.copy()
    bad[2, 0] = -1.0
    with pytest.raises(ProtocolError, match="rx 2 gain"):
        decode_welcome(parts[:3] + [bad.tobytes()], None)
    # an older serve's welcome (three parts) means no correction
    plain = [bytes(memoryview(p)) for p in encode_welcome("S1", WorkerConfig(sensor, ProcessingSettings(), None, 0.0))]
    assert len(plain) == 3 and decode_welcome(plain, None)[1].iq_imbalance is None


def test_a_live_settings_change_keeps_the_table_with_workers_and_alone():
    # serve's control endpoint changes the settings: the new chain (serve's own, and the worker's) is
    # built with the same I/Q table; every cloud after the switch is Pipeline(new settings, iq_imbalance)
    from tests.test_control import NEW, Feeder, ask, matches, points_from, serve_with_control
    from tests.test_service import running_service
    from tests.test_workers import YARD, serving
    with CaptureReader(YARD) as r:
        yard = capture_sensor(r)
        raw = [r.read(i).payload for i in range(len(r))]
    table = np.column_stack([TRUE_G, TRUE_PHI])

    def refs(iq, **fields):
        p = Pipeline(yard, ProcessingSettings(**fields), iq_imbalance=iq)
        return [p.process(yard.raw_to_canonical(f)).copy() for f in raw]
    new_iq, new_plain = refs(table, **NEW), refs(None, **NEW)
    assert any(a.tobytes() != b.tobytes() for a, b in zip(new_iq, new_plain))
    for runner, kw in ((serving, {"workers": 1}), (running_service, {})):
        with serve_with_control(yard, runner=runner, iq_imbalance=table, **kw) as (svc, pub, col):
            with Feeder(pub, raw) as feed:
                points_from(col, 0, 3)
                reply = ask(svc.control_endpoint, {"op": "set", "settings": NEW}, timeout_s=60.0)
                assert reply is not None and reply["ok"], reply
                after = points_from(col, feed.seq, 6)
        assert after and all(matches(m, new_iq) for m in after), runner
