"""The accuracy harness: its Cramér-Rao bounds against independent derivations (the Fisher information
of the signal model computed numerically from its derivatives, and closed forms from the papers),
and a smoke run of the Monte Carlo. The chain's accuracy targets are tested elsewhere; here a loose
check only proves that the harness compares the right point with the right truth."""

from __future__ import annotations

import math

import numpy as np
import pytest

from cubecast.daemon import accuracy
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.sensor import load_sensor

from .helpers import YARD_SENSOR, make_sensor

C = 299_792_458.0


def _numeric_fisher(signal, theta, noise_power, step=1e-6):
    """Fisher matrix of real parameters theta for a complex signal in circular white Gaussian
    noise of total power noise_power per sample: F_ij = (2 / sigma^2) Re sum conj(ds/dtheta_i)
    ds/dtheta_j (Kay, Fundamentals of Statistical Signal Processing I, 1993, eq. 15.52), the
    derivatives by central differences."""
    theta = np.asarray(theta, np.float64)
    cols = []
    for i in range(len(theta)):
        h = step * max(1.0, abs(theta[i]))
        up, dn = theta.copy(), theta.copy()
        up[i] += h
        dn[i] -= h
        cols.append((signal(up) - signal(dn)) / (2.0 * h))
    j = np.stack([c.ravel() for c in cols], axis=1)
    return 2.0 / noise_power * np.real(j.conj().T @ j)


@pytest.mark.parametrize("n", [4, 7, 16])
def test_tone_bound_is_the_inverse_fisher_information_of_a_tone(n):
    # s_n = A exp(j (omega n + phi)), n = 0..N-1 (the index origin is absorbed by the phase):
    # parameters (omega, A, phi); the bound on omega is [F^-1]_00
    amp, noise_power = 0.7, 2.0
    fisher = _numeric_fisher(lambda t: t[1] * np.exp(1j * (t[0] * np.arange(n) + t[2])), [0.9, amp, 0.3],
                             noise_power)
    expected = math.sqrt(np.linalg.inv(fisher)[0, 0])
    assert accuracy.tone_frequency_crb_rad(amp ** 2 / noise_power, n) == pytest.approx(expected, rel=1e-5)
    # Rife and Boorstyn 1974 in their own notation: var >= 12 sigma^2 / (A^2 N (N^2 - 1)), sigma^2 the
    # noise variance of each real component (here noise_power / 2)
    rb = math.sqrt(12.0 * (noise_power / 2.0) / (amp ** 2 * n * (n * n - 1)))
    assert accuracy.tone_frequency_crb_rad(amp ** 2 / noise_power, n) == pytest.approx(rb, rel=1e-12)


def test_tone_bound_over_independent_looks():
    # L rows of the same frequency, each with its own amplitude and phase: parameters (omega, A_l, phi_l)
    n, looks, noise_power, amp = 6, 3, 1.0, 0.5

    def signal(t):
        idx = np.arange(n)
        return np.stack([t[1 + 2 * l] * np.exp(1j * (t[0] * idx + t[2 + 2 * l])) for l in range(looks)])

    theta = [0.4] + [amp if k % 2 == 0 else 0.2 * k for k in range(2 * looks)]
    fisher = _numeric_fisher(signal, theta, noise_power)
    expected = math.sqrt(np.linalg.inv(fisher)[0, 0])
    assert accuracy.tone_frequency_crb_rad(amp ** 2 / noise_power, n, looks) == pytest.approx(expected, rel=1e-5)


def _yard_like():
    return make_sensor(n_tx_az=2, n_rx=2, loops=8, samples=16)


def test_range_bound_from_the_beat_signal():
    # dechirped signal of one look: s_n = A exp(j (2 pi S (2 R / c) n / fs + phi)); the parameter is R
    # itself, so the conversion from rad per sample to metres is checked too
    sensor = _yard_like()
    s, fs, n = sensor.slope_hz_per_s, sensor.sample_rate_hz, sensor.samples_per_chirp
    looks = sensor.n_loops * sensor.n_virtual
    amp, noise_power = 0.3, 1.0

    def signal(t):
        return t[1] * np.exp(1j * (2.0 * np.pi * s * 2.0 * t[0] / C * np.arange(n) / fs + t[2]))

    var_one_look = np.linalg.inv(_numeric_fisher(signal, [7.3, amp, 0.1], noise_power))[0, 0]
    expected = math.sqrt(var_one_look / looks)  # independent looks add their information
    assert accuracy.range_crb_m(sensor, amp ** 2 / noise_power) == pytest.approx(expected, rel=1e-5)


def test_velocity_bound_from_the_slow_time_signal():
    # over the loops: s_m = A exp(j (2 pi (2 v / lambda) m T_loop + phi)), lambda at the centre of the
    # sampled sweep, T_loop = slots x chirp period (TDM)
    sensor = _yard_like()
    sn = sensor
    f_c = sn.start_frequency_hz
    f_centre = f_c + sensor.slope_hz_per_s * (
        sensor.adc_start_delay_s + 0.5 * sensor.samples_per_chirp / sensor.sample_rate_hz)
    lam = C / f_centre
    t_loop = sensor.n_tx * sensor.chirp_period_s
    m = sensor.n_loops
    looks = sensor.samples_per_chirp * sensor.n_virtual
    amp, noise_power = 0.2, 1.0

    def signal(t):
        return t[1] * np.exp(1j * (2.0 * np.pi * 2.0 * t[0] / lam * np.arange(m) * t_loop + t[2]))

    var_one_look = np.linalg.inv(_numeric_fisher(signal, [1.7, amp, 0.4], noise_power))[0, 0]
    expected = math.sqrt(var_one_look / looks)
    assert accuracy.velocity_crb_mps(sensor, amp ** 2 / noise_power) == pytest.approx(expected, rel=1e-5)


@pytest.mark.parametrize("theta_deg", [0.0, 25.0, -50.0])
def test_direction_bound_of_a_uniform_line_array(theta_deg):
    # K elements lambda/2 apart, one source, one snapshot: var(theta) = 6 / (SNR pi^2 cos^2(theta) K (K^2 - 1))
    # (the uniform-linear-array case of Stoica and Nehorai 1989; written from memory, derived again
    # here from F = 2 SNR sum (dphi_k/dtheta - mean)^2 with phi_k = pi k sin(theta))
    lam, k, snr = 0.004, 8, 5.0
    pos = np.stack([np.arange(k) * lam / 2.0, np.zeros(k), np.zeros(k)], axis=1)
    sigma_az, sigma_el = accuracy.direction_crb_deg(pos, lam, snr, theta_deg, 0.0, elevation=False)
    th = math.radians(theta_deg)
    expected = math.sqrt(6.0 / (snr * math.pi ** 2 * math.cos(th) ** 2 * k * (k * k - 1)))
    assert sigma_az == pytest.approx(math.degrees(expected), rel=1e-9)
    assert math.isnan(sigma_el)


@pytest.mark.parametrize("az_deg, el_deg", [(0.0, 0.0), (40.0, -12.0), (-58.0, 9.0)])
def test_direction_bound_is_the_inverse_fisher_information_of_the_snapshot(az_deg, el_deg):
    # the bundled sensor's virtual array (12 elements, two rows): y_k = s a_k(az, el) with
    # a_k = exp(j 2 pi / lambda p_k . r), r = (cos el sin az, cos el cos az, sin el); parameters
    # (az, el, Re s, Im s), the amplitude eliminated by inverting the whole Fisher matrix
    sensor = load_sensor(YARD_SENSOR)
    pos, lam = sensor.virtual_positions_m, sensor.wavelength_m
    noise_power, s0 = 1.0, 0.9 + 0.4j

    def signal(t):
        az, el = t[0], t[1]
        r = np.array([math.cos(el) * math.sin(az), math.cos(el) * math.cos(az), math.sin(el)])
        return (t[2] + 1j * t[3]) * np.exp(2j * np.pi / lam * (pos @ r))

    theta = [math.radians(az_deg), math.radians(el_deg), s0.real, s0.imag]
    crb = np.linalg.inv(_numeric_fisher(signal, theta, noise_power, step=1e-7))
    sigma_az, sigma_el = accuracy.direction_crb_deg(pos, lam, abs(s0) ** 2 / noise_power, az_deg, el_deg)
    assert sigma_az == pytest.approx(math.degrees(math.sqrt(crb[0, 0])), rel=1e-4)
    assert sigma_el == pytest.approx(math.degrees(math.sqrt(crb[1, 1])), rel=1e-4)


def test_integrated_snr_is_over_samples_loops_and_virtual_channels():
    sensor = load_sensor(YARD_SENSOR)  # 128 samples, 32 loops, 3 x 4 virtual channels
    assert accuracy.per_sample_snr(sensor, 30.0) * 128 * 32 * 12 == pytest.approx(1000.0)


def test_smoke_run_structure_and_truth_within_a_few_bounds():
    sensor = load_sensor(YARD_SENSOR)
    rows = accuracy.sweep(sensor, None, (30.0, 50.0), n_trials=4, seed=3)
    assert [r["snr_db"] for r in rows] == [30.0, 50.0]
    for r in rows:
        assert r["trials"] == 4 and 0 <= r["detected"] <= 4
        assert r["snr_per_sample_db"] == pytest.approx(r["snr_db"] - 10.0 * math.log10(128 * 32 * 12))
        assert r["snr_per_element_db"] == pytest.approx(r["snr_per_sample_db"] + 10.0 * math.log10(128 * 32))
    high = rows[0]
    assert high["detected"] == 4  # 30 dB integrated: every target is far above the CFAR threshold
    for c in accuracy.COORDINATES:
        stats = high[c]
        assert set(stats) >= {"rmse", "crb", "sigma", "bias", "rmse_over_crb", "rmse_over_sigma", "unit"}
        assert stats["rmse"] >= abs(stats["bias"])
        # loose on purpose (the chain's targets are tested elsewhere): a wrong sign, unit, truth epoch
        # or matched point would be off by many bounds (a range or velocity cell is about 80 bounds at 30 dB)
        assert stats["rmse"] < 5.0 * stats["crb"], (c, stats)
        assert stats["rmse_over_crb"] == pytest.approx(stats["rmse"] / stats["crb"])
    # the same trials at another seed are other trials; the same seed repeats them exactly
    again = accuracy.run_trials(sensor, None, 30.0, 4, seed=3)
    assert again["range"]["rmse"] == high["range"]["rmse"]


def test_targets_are_drawn_where_the_bench_says_and_can_be_fixed():
    sensor = load_sensor(YARD_SENSOR)
    row = accuracy.run_trials(sensor, None, 40.0, 6, seed=1, per_trial=True)
    truth = row["per_trial"]["truth"]
    # azimuth -60..60 deg, elevation +-15 deg (the array has elevation extent), radial velocity within
    # 75 % of the unambiguous lambda / (4 T_loop); radial motion keeps the angles
    v_max = C / sensor.center_frequency_hz / (4.0 * sensor.n_tx * sensor.chirp_period_s)
    assert np.all(np.abs(truth["azimuth_deg"]) <= 60.0) and np.all(np.abs(truth["elevation_deg"]) <= 15.0)
    assert np.all(np.abs(truth["velocity_mps"]) <= 0.75 * v_max)
    assert len(set(np.round(truth["range_m"], 6))) == 6  # a fresh target per trial
    detected = row["per_trial"]["detected"]
    assert np.all(np.isfinite(row["per_trial"]["range"]["error"][detected]))
    assert np.all(np.isnan(row["per_trial"]["range"]["error"][~detected]))
    fixed = accuracy.Draws((10.0, 10.0), (0.0, 0.0), (20.0, 20.0), (-5.0, -5.0))
    row = accuracy.run_trials(sensor, None, 40.0, 2, seed=1, draws=fixed, per_trial=True)
    truth = row["per_trial"]["truth"]
    for field, value in (("range_m", 10.0), ("velocity_mps", 0.0), ("azimuth_deg", 20.0), ("elevation_deg", -5.0)):
        assert truth[field] == pytest.approx([value, value], abs=1e-9), field


def test_run_trials_refuses_sensors_the_bounds_do_not_cover():
    with pytest.raises(CubecastError, match="TDM sensor with complex sampling"):
        accuracy.run_trials(make_sensor(sampling="real", sample_type="int16"), None, 30.0, 2)
