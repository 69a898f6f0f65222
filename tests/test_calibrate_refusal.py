"""When `cubecast calibrate` refuses a capture (daemon/calibchecks.py reflector_refusals, calibrate.py,
calibfile.py): no reflector at the given place, or one too weak for the stated phase accuracy.

The rule is the Cramér-Rao bound of a phase: a complex sample of SNR s has phase standard deviation
1 / sqrt(2 s) rad at high SNR (Rife and Boorstyn, "Single-tone parameter estimation from discrete-time
observations", IEEE Trans. IT, 1974; Kay, "Fundamentals of Statistical Signal Processing: Estimation
Theory", 1993), so F frames of per-channel SNR s give 1 / sqrt(2 F s). The captures are simulated
(daemon/simulate.py) with the true per-channel cell SNR set through the range equation or an explicit
per-sample SNR and the windows' gain (tests/test_calibrate.py cell_gain_db), so the refusal is tested
below and above the threshold against the truth, not against the code's own estimate.
"""

from __future__ import annotations

import logging
import math
import re

import numpy as np
import pytest
from scipy import stats

from cubecast.daemon.calibchecks import MIN_INTEGRATED_SNR_DB, PHASE_ACCURACY_DEG, noise_only_level
from cubecast.daemon.calibfile import load_calibration, load_calibration_file, write_calibration
from cubecast.daemon.calibrate import calibrate_capture
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.sensor import load_sensor
from cubecast.daemon.simulate import range_equation_snr_db
from tests.helpers import YARD_SENSOR
from tests.test_calibrate import (CALIBRATE_LOGGER, calibrate_log, cell_gain_db, channel_errors, cli,  # noqa: F401
                                  write_reflector_capture)

THRESHOLD_FRAMES = 8
MARGIN_DB = 1.0  # below / above the threshold; more than 5 standard deviations of the estimate (checked)

# A corner reflector on a bench in a loading yard, 7.5 m out and a little right and below the sensor (on its
# post 1 m up), with the yard's static clutter further out and a forklift driving across.
BENCH_RANGE_M, BENCH_AZIMUTH_DEG, BENCH_ELEVATION_DEG = 7.5, 10.0, -3.0
YARD_BENCH = f"""
[scene]
name = "corner reflector on a loading-yard bench"
[[target]]
name = "corner reflector on the bench"
range_m = {BENCH_RANGE_M}
azimuth_deg = {BENCH_AZIMUTH_DEG}
elevation_deg = {BENCH_ELEVATION_DEG}
rcs_dbsm = 10.0
[[target]]
name = "container wall"
range_m = 14.0
azimuth_deg = -30.0
rcs_dbsm = 12.0
[[target]]
name = "lamp post"
range_m = 11.0
azimuth_deg = 35.0
rcs_dbsm = 0.0
[[target]]
name = "forklift"
position_m = [-3.0, 9.0, 0.0]
velocity_mps = [1.5, 0.0, 0.0]
rcs_dbsm = 8.0
"""


@pytest.fixture(scope="module")
def sensor():
    return load_sensor(YARD_SENSOR)


def phase_only_errors(sensor):
    """Channel phase errors only (equal amplitudes): every channel then has the same SNR."""
    return channel_errors(sensor, seed=11, amp_db=0.0, phase_deg=40.0)


def per_sample_snr_db_for(sensor, range_m, integrated_db, frames):
    """The per-sample SNR that gives a static point at `range_m` the integrated per-channel cell SNR
    `integrated_db` over `frames` frames."""
    return integrated_db - 10.0 * math.log10(frames) - cell_gain_db(sensor, range_m)


def estimate_sd_db(sensor, integrated_db, frames):
    """Standard deviation (dB) of the SNR estimate: mean |z|^2 / sigma^2 - 1 over F x V samples has
    variance (1 + 2 s) / (F V) for a constant signal of SNR s in complex Gaussian noise (non-central
    chi-square, common practice); the noise power is the median of at least a quarter of the
    range-Doppler map's cells per frame, the median of N Gamma(K) variables having standard deviation
    1 / (2 f(m) sqrt(N)) (asymptotic distribution of a sample median; common practice), K the map's
    channels (slots x RX)."""
    s = 10.0 ** (integrated_db / 10.0) / frames
    n = frames * sensor.n_virtual
    rel_signal = math.sqrt((1.0 + 2.0 * s) / n) / s
    k = sensor.n_slots * sensor.n_rx
    cells = frames * sensor.samples_per_chirp * sensor.n_loops // 8  # a quarter of the map's cells, at least
    g = stats.gamma(k)
    rel_noise = 1.0 / (2.0 * g.pdf(g.median()) * math.sqrt(cells)) / g.median()
    return 10.0 / math.log(10.0) * math.hypot(rel_signal, rel_noise * (1.0 + 1.0 / s))


def threshold_capture(tmp_path, sensor, integrated_db, frames=THRESHOLD_FRAMES, seed=1):
    snr_db = per_sample_snr_db_for(sensor, 5.0, integrated_db, frames)
    scene = f"[[target]]\nname = \"corner\"\nrange_m = 5.0\nsnr_db = {snr_db}\n"
    return write_reflector_capture(tmp_path / f"snr{integrated_db:.2f}_{frames}.cap", sensor, scene, frames,
                                   phase_only_errors(sensor), seed=seed)


# ---- the threshold --------------------------------------------------------------------------------

def test_the_threshold_is_the_snr_of_the_stated_phase_accuracy():
    # 1 / sqrt(2 s) = 1 deg  <=>  s = 1 / (2 (pi / 180)^2) = 1641.3, 32.15 dB (Rife and Boorstyn 1974)
    assert PHASE_ACCURACY_DEG == 1.0
    assert MIN_INTEGRATED_SNR_DB == pytest.approx(10.0 * math.log10(1.0 / (2.0 * (math.pi / 180.0) ** 2)), abs=1e-9)
    assert MIN_INTEGRATED_SNR_DB == pytest.approx(32.15, abs=0.01)


def test_refused_below_the_threshold_and_accepted_above(tmp_path, sensor):
    assert MARGIN_DB > 5.0 * estimate_sd_db(sensor, MIN_INTEGRATED_SNR_DB, THRESHOLD_FRAMES)
    below = calibrate_capture(threshold_capture(tmp_path, sensor, MIN_INTEGRATED_SNR_DB - MARGIN_DB), 5.0)
    above = calibrate_capture(threshold_capture(tmp_path, sensor, MIN_INTEGRATED_SNR_DB + MARGIN_DB), 5.0)
    assert len(below.refusals) == 1 and below.refusals[0].startswith("reflector too weak: at 5.0"), below.refusals
    assert above.refusals == [], above.refusals
    # the estimates agree with the truth to the estimate's own scatter (5 sigma)
    for res, true_db in ((below, MIN_INTEGRATED_SNR_DB - MARGIN_DB), (above, MIN_INTEGRATED_SNR_DB + MARGIN_DB)):
        assert abs(res.integrated_snr_db - true_db) < 5.0 * estimate_sd_db(sensor, true_db, THRESHOLD_FRAMES)
    # and what is accepted has the stated accuracy: the gain phases' errors (common phase removed) have
    # rms sigma sqrt(chi2(V - 1) / V) with sigma = 1 / sqrt(2 F s), below 1 deg at 1 dB over the threshold;
    # the bound is chi-square's 0.999 quantile (common practice)
    err = above.gain / phase_only_errors(sensor)
    err *= np.exp(-1j * np.angle(err.sum()))
    rms_deg = math.degrees(math.sqrt(np.mean(np.angle(err) ** 2)))
    v = sensor.n_virtual
    sigma_deg = PHASE_ACCURACY_DEG * 10.0 ** (-MARGIN_DB / 20.0)
    assert rms_deg < sigma_deg * math.sqrt(stats.chi2.ppf(0.999, v - 1) / v)
    # refused: nothing is written without force, naming the file and the refusal
    with pytest.raises(CubecastError, match=r"--out .*weak\.toml: not written, .*reflector too weak"):
        write_calibration(tmp_path / "weak.toml", below)
    assert not (tmp_path / "weak.toml").exists()


def test_noise_only_level_against_monte_carlo():
    # the largest of W cells, each the mean of n unit exponentials (|z|^2 / sigma^2 of complex Gaussian
    # noise, common practice), exceeds the level with the stated probability: a binomial count of
    # 40000 trials, within 4 of its standard deviations
    rng = np.random.default_rng(4)
    n, cells, p = 24, 9, 0.05
    level = noise_only_level(n, cells, p)
    trials = 40000
    largest = rng.exponential(size=(trials, cells, n)).mean(axis=2).max(axis=1)
    hits = int(np.count_nonzero(largest > level))
    assert abs(hits - p * trials) < 4.0 * math.sqrt(trials * p * (1 - p))


def test_noise_alone_is_no_reflector(tmp_path, sensor):
    # a capture of noise only (a scene needs a target: one 100 dB under the noise): nothing to find
    # anywhere, said as such
    cap = write_reflector_capture(tmp_path / "empty.cap", sensor, "[[target]]\nrange_m = 5.0\nsnr_db = -100.0\n",
                                  6, phase_only_errors(sensor))
    res = calibrate_capture(cap, 5.0)
    assert len(res.refusals) == 1
    assert res.refusals[0].startswith("no reflector within +-0.78 m of 5 m")
    assert "no zero-Doppler echo elsewhere in the capture is strong enough either" in res.refusals[0]


def test_more_frames_as_advised_make_a_weak_reflector_usable(tmp_path, sensor):
    # 4 frames at 2.5 dB under the threshold: the advice is the number of frames at which the true SNR
    # reaches the threshold, or the next (it is computed cautiously from the estimate less 3 sigma)
    true_db = MIN_INTEGRATED_SNR_DB - 2.5
    res = calibrate_capture(threshold_capture(tmp_path, sensor, true_db, frames=4), 5.0)
    (text,) = res.refusals
    frames = int(re.search(r"record at least (\d+) frames", text).group(1))
    need = math.ceil(4 * 10.0 ** (2.5 / 10.0))  # 7.1 -> 8
    assert frames in (need, need + 1), text
    s_db = true_db - 10.0 * math.log10(4)  # the same reflector, recorded for longer
    snr_db = s_db - cell_gain_db(sensor, 5.0)
    longer = write_reflector_capture(tmp_path / "longer.cap", sensor,
                                     f"[[target]]\nrange_m = 5.0\nsnr_db = {snr_db}\n", frames,
                                     phase_only_errors(sensor), seed=3)
    assert calibrate_capture(longer, 5.0).refusals == []


# ---- the bench in the yard: no reflector at the given range ----------------------------------------

def test_no_reflector_at_the_given_range_is_refused_with_what_would_work(tmp_path, sensor, capsys, calibrate_log):
    frames = 6
    cap = write_reflector_capture(tmp_path / "bench.cap", sensor, YARD_BENCH, frames, phase_only_errors(sensor))
    out = tmp_path / "bench.toml"
    assert cli(["calibrate", str(cap), "--target-range-m", "3.0", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"cubecast calibrate: error: --out {out}: not written, ") and err.count("\n") == 1
    assert "no reflector within +-0.78 m of 3 m" in err and "dB over the noise" in err
    assert "put a corner reflector at 3 m, azimuth +0.0 deg, elevation +0.0 deg" in err
    assert "(--force writes it anyway)" in err
    assert not out.exists()
    # the reflector it points to is the bench's, to within half a range cell (0.195 m, c / 2B)
    seen = float(re.search(r"give --target-range-m ([0-9.]+) for the reflector seen at", err).group(1))
    assert abs(seen - BENCH_RANGE_M) < 0.1
    # the reflector it asks for: by the range equation (Skolnik 2001, simulate.py) one of the advised RCS
    # plus a margin reaches the threshold at 3 m in those frames, one with the margin less does not
    rcs = float(re.search(r"at least (-?[0-9.]+) dBsm for 6 frames", err).group(1))
    truth_db = float(range_equation_snr_db(sensor, 3.0, rcs)) + cell_gain_db(sensor, 3.0) + 10.0 * math.log10(frames)
    assert abs(truth_db - MIN_INTEGRATED_SNR_DB) < 0.1 + 0.05  # the advice's rounding and the window's scalloping
    for delta, refused in ((MARGIN_DB, False), (-MARGIN_DB, True)):
        scene = YARD_BENCH + f"[[target]]\nname = \"corner at 3 m\"\nrange_m = 3.0\nrcs_dbsm = {rcs + delta}\n"
        res = calibrate_capture(write_reflector_capture(tmp_path / f"three{delta}.cap", sensor, scene, frames,
                                                        phase_only_errors(sensor)), 3.0)
        assert bool(res.refusals) == refused, (delta, res.refusals)

    # --force: written, the refusal logged as a warning and kept in the file; using the file warns
    calibrate_log.clear()
    assert cli(["calibrate", str(cap), "--target-range-m", "3.0", "--out", str(out), "--force"]) == 0
    warnings = [r.getMessage() for r in calibrate_log.records
                if r.name == CALIBRATE_LOGGER and r.levelno == logging.WARNING]
    assert any(w.startswith("cubecast calibrate: warning: written with --force: no reflector within") for w in warnings)
    f = load_calibration_file(out, sensor)
    assert len(f.refused) == 1 and f.refused[0].startswith("no reflector within")
    seen_by_loader = []
    handler = logging.Handler(logging.WARNING)
    handler.emit = seen_by_loader.append
    loader_log = logging.getLogger("cubecast.daemon.calibfile")
    loader_log.addHandler(handler)
    try:
        load_calibration(out, sensor)
    finally:
        loader_log.removeHandler(handler)
    assert any("written with --force although no reflector" in r.getMessage() for r in seen_by_loader)

    # the range it suggests is accepted
    good = tmp_path / "good.toml"
    assert cli(["calibrate", str(cap), "--target-range-m", f"{seen}", "--azimuth-deg", f"{BENCH_AZIMUTH_DEG}",
                "--elevation-deg", f"{BENCH_ELEVATION_DEG}", "--out", str(good), "--quiet"]) == 0
    assert load_calibration_file(good, sensor).refused == ()


def test_the_slope_of_an_echo_outside_the_searched_cells_is_no_reflector(tmp_path, sensor):
    # a strong reflector at 6.1 m, given as 5 m: the searched cells (4 either side, 0.195 m each: c / 2B,
    # Richards 2005) end at 5.86 m, on its slope; the refusal points to it
    cap = write_reflector_capture(tmp_path / "slope.cap", sensor, "[[target]]\nrange_m = 6.1\nrcs_dbsm = 10.0\n", 4,
                                  phase_only_errors(sensor))
    (text,) = calibrate_capture(cap, 5.0).refusals
    assert text.startswith("no reflector within +-0.78 m of 5 m: the strongest zero-Doppler cell there, at 5.86 m, "
                           "is on the slope of an echo outside them, no peak;")
    seen = float(re.search(r"give --target-range-m ([0-9.]+) for the reflector seen", text).group(1))
    assert abs(seen - 6.1) < 0.1
    assert calibrate_capture(cap, seen).refusals == []
