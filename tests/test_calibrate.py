"""Array calibration from a corner-reflector capture: daemon/calibrate.py, calibfile.py and
`cubecast calibrate`.

The bundled sensor (3 TX x 4 RX TDM, an 8-element azimuth row) gets random per-channel gain errors
(+-2 dB, +-30 deg), applied to the simulator's canonical frames the way a front end would: chirp m of
TX k at RX l is multiplied by g[k * n_rx + l]. The checks compare against the injected errors, the
scene geometry, the radar range equation and the uniform array's sidelobe level.
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pytest

from cubecast.daemon.calibfile import load_calibration, load_calibration_file, write_calibration
from cubecast.daemon.calibrate import MIN_INTEGRATED_SNR_DB, calibrate_capture
from cubecast.daemon.capture import CaptureWriter
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sensor import SPEED_OF_LIGHT_MPS, load_sensor, parse_sensor
from cubecast.daemon.simulate import Simulator, range_equation_snr_db
from tests.helpers import YARD_SENSOR, make_sensor

REFLECTOR_RANGE_M = 5.0
REFLECTOR_RCS_DBSM = 10.0
CAL_FRAMES = 20
CHECK_FRAMES = 6
SWEEP_AZIMUTHS_DEG = np.arange(-60.0, 61.0, 10.0)
SWEEP_RANGE_M = 9.0


# ---- helpers ----------------------------------------------------------------------------------

def channel_errors(sensor, seed=20260101, amp_db=2.0, phase_deg=30.0):
    rng = np.random.default_rng(seed)
    v = sensor.n_virtual
    return 10.0 ** (rng.uniform(-amp_db, amp_db, v) / 20.0) * np.exp(1j * np.radians(rng.uniform(-phase_deg, phase_deg, v)))


def apply_channel_gains(sensor, frame, gains):
    """TDM: chirp m belongs to slot m % n_slots, whose one active TX is k; RX l of that chirp sees
    virtual channel k * n_rx + l, so it is multiplied by gains[k * n_rx + l]."""
    tx_of_slot = np.array([int(np.flatnonzero(row)[0]) for row in sensor.mimo_code])
    k = tx_of_slot[np.arange(sensor.chirps_per_frame) % sensor.n_slots]  # [chirp]
    factor = gains[k[:, None] * sensor.n_rx + np.arange(sensor.n_rx)[None, :]]  # [chirp, rx]
    return (frame * factor[:, :, None]).astype(np.complex64)


def write_reflector_capture(path, sensor, scene_text, frames, gains, seed=1):
    """A capture as the board would deliver it (quantised int16 I/Q) with the channel errors in it."""
    sim = Simulator(sensor, parse_scene(scene_text), seed=seed)
    with CaptureWriter(path, sensor.source_text, metadata={"source": "test"}) as w:
        for i in range(frames):
            frame = apply_channel_gains(sensor, sim.frame(i), gains)
            w.write(sensor.canonical_to_raw(frame), sequence=i, timestamp_s=sim.frame_time_s(i))
    return path


def cell_gain_db(sensor, range_m):
    """Per-channel SNR of a static point's range-Doppler cell over its per-sample SNR (TDM): the coherent
    gain of the Hann-windowed range and Doppler FFTs, (sum w)^2 / sum w^2 each (Harris 1978; the chain's
    Hann window has no zero ends), less the Hann scalloping loss at the point's fractional range bin (beat
    frequency 2 S R / c over the bin width fs / N, Richards 2005; common practice)."""
    w_r, w_d = np.hanning(sensor.samples_per_chirp + 2)[1:-1], np.hanning(sensor.n_loops + 2)[1:-1]
    gain_db = 10.0 * math.log10(w_r.sum() ** 2 / (w_r ** 2).sum() * w_d.sum() ** 2 / (w_d ** 2).sum())
    beat_bin = 2.0 * sensor.slope_hz_per_s * range_m / SPEED_OF_LIGHT_MPS \
        / (sensor.sample_rate_hz / sensor.samples_per_chirp)
    delta = beat_bin - round(beat_bin)
    n = np.arange(sensor.samples_per_chirp)
    scallop_db = 20.0 * math.log10(abs(np.sum(w_r * np.exp(-2j * np.pi * delta * n / len(n)))) / w_r.sum())
    return gain_db + scallop_db


def reflector_scene(range_m=REFLECTOR_RANGE_M, rcs_dbsm=REFLECTOR_RCS_DBSM, extra=""):
    return f"[[target]]\nname = \"corner\"\nrange_m = {range_m}\nrcs_dbsm = {rcs_dbsm}\n{extra}"


def point_frame(sensor, azimuth_deg, gains, seed):
    sim = Simulator(sensor, parse_scene(f"[[target]]\nrange_m = {SWEEP_RANGE_M}\nazimuth_deg = {azimuth_deg}\n"
                                        f"rcs_dbsm = {REFLECTOR_RCS_DBSM}\n"), seed=seed)
    return apply_channel_gains(sensor, sim.frame(0), gains)


def measured_azimuth(pipeline, frame):
    pts = pipeline.process(frame)
    near = pts[np.abs(pts["range_m"] - SWEEP_RANGE_M) < 0.5]
    assert len(near), "the target was not detected"
    return float(near["azimuth_deg"][np.argmax(near["snr_db"])])


def azimuth_row_snapshot(sensor, frame, range_m):
    """Virtual snapshot of the 8 channels on the z = 0 row, decoded here independently of the chain's
    MIMO stage: TX k's channels come from the slot in which k transmits, at zero Doppler."""
    pipe = Pipeline(sensor)
    pipe.process(frame)
    spec = pipe.doppler_fft.spectrum  # [rx, slot, range, doppler]
    # range bin: beat frequency 2 S R / c over the bin width fs / N (Richards 2005, common practice)
    rbin = int(round(2.0 * sensor.slope_hz_per_s * range_m / SPEED_OF_LIGHT_MPS
                     / (sensor.sample_rate_hz / sensor.samples_per_chirp)))
    slot_of_tx = [int(np.flatnonzero(sensor.mimo_code[:, k])[0]) for k in range(sensor.n_tx)]
    snap = np.array([spec[l, slot_of_tx[k], rbin, 0] for k in range(sensor.n_tx) for l in range(sensor.n_rx)])
    pos = sensor.virtual_positions_m
    row = np.flatnonzero(np.abs(pos[:, 2]) < 1e-9)
    return snap, row[np.argsort(pos[row, 0])]


def peak_sidelobe_db(row_values, n_fft=4096):
    """Peak sidelobe level of the zero-padded FFT of a uniform row: the highest point outside the
    main lobe (bounded by the first minima either side), relative to the main peak."""
    p = np.abs(np.fft.fft(row_values, n_fft)) ** 2
    p = np.roll(p, n_fft // 2 - int(np.argmax(p)))
    c = n_fft // 2
    a = c
    while p[a - 1] < p[a]:
        a -= 1
    b = c
    while p[b + 1] < p[b]:
        b += 1
    side = np.concatenate([p[:a], p[b + 1:]])
    return 10.0 * math.log10(side.max() / p[c])


def uniform_array_psl_db(n):
    """Peak sidelobe of an n-element uniform array: |sin(n psi / 2) / (n sin(psi / 2))|^2 beyond the
    first null psi = 2 pi / n (the Dirichlet kernel; about -13 dB, Harris 1978; common practice)."""
    psi = np.linspace(2.0 * np.pi / n, np.pi, 200001)
    af = np.sin(n * psi / 2.0) / (n * np.sin(psi / 2.0))
    return 10.0 * math.log10(np.max(af ** 2))


# ---- fixtures ---------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def sensor():
    return load_sensor(YARD_SENSOR)


@pytest.fixture(scope="module")
def gains(sensor):
    return channel_errors(sensor)


@pytest.fixture(scope="module")
def calibration(tmp_path_factory, sensor, gains):
    d = tmp_path_factory.mktemp("calibrate")
    cap = write_reflector_capture(d / "corner.cap", sensor, reflector_scene(), CAL_FRAMES, gains)
    result = calibrate_capture(cap, REFLECTOR_RANGE_M)
    path = d / "calib.toml"
    write_calibration(path, result)
    return {"capture": cap, "result": result, "path": path}


# ---- the gains --------------------------------------------------------------------------------

def test_clean_reflector_gives_no_warning(calibration):
    assert calibration["result"].warnings == []
    assert calibration["result"].frames_used == CAL_FRAMES


def iq_correction_gain(sensor, iq_table):
    """Per virtual channel, the gain mu that correcting an ideal receiver with the file's I/Q estimate
    (g, phi) gives an echo: I = I', Q = (Q' / g + I' sin phi) / cos phi maps z = 1 to 1 + j tan phi and
    z = j to j / (g cos phi), so y = mu z + nu conj(z) with mu = (y(1) - j y(j)) / 2 = (1 + j tan phi +
    1 / (g cos phi)) / 2 (README "I/Q imbalance"). The array pass measures the gains of the corrected
    frames, as the chain will see them."""
    if iq_table is None:
        return np.ones(sensor.n_virtual)
    g, phi = iq_table[:, 0], iq_table[:, 1]
    mu_rx = (1.0 + 1j * np.tan(phi) + 1.0 / (g * np.cos(phi))) / 2.0
    return np.tile(mu_rx, sensor.n_tx)  # v = tx * n_rx + rx


def test_measured_gains_match_the_injected_errors(calibration, gains, sensor):
    res = calibration["result"]
    est = res.gain / (gains * iq_correction_gain(sensor, res.iq.table))
    est = est / est[0]
    phase_err_deg = np.degrees(np.angle(est))
    amp_err_db = 20.0 * np.log10(np.abs(est))
    amp_err_db -= amp_err_db.mean()
    # At the reflector's SNR (about 57 dB per channel and frame, 20 frames) the phase of each channel
    # is known to 1 / sqrt(2 SNR) ~ 0.01 deg (Rife and Boorstyn, IEEE Trans. IT, 1974); a tenth of a
    # degree and a hundredth of a dB leave room for the int16 quantisation.
    assert np.max(np.abs(phase_err_deg)) < 0.1
    assert np.max(np.abs(amp_err_db)) < 0.01


def test_cell_snr_matches_the_range_equation(calibration, sensor):
    # Per-sample SNR from the radar range equation (Skolnik, Introduction to Radar Systems, 2001),
    # plus the gain of the range and Doppler FFTs at the reflector's cell (cell_gain_db, Harris 1978).
    res = calibration["result"]
    snr_sample_db = float(range_equation_snr_db(sensor, REFLECTOR_RANGE_M, REFLECTOR_RCS_DBSM))
    expected_db = snr_sample_db + cell_gain_db(sensor, REFLECTOR_RANGE_M)
    assert abs(res.cell_snr_db - expected_db) < 1.0
    # frame-to-frame phase scatter of each channel: 1 / sqrt(2 SNR) rad (Rife and Boorstyn 1974)
    expected_phase_deg = math.degrees(1.0 / math.sqrt(2.0 * 10.0 ** (expected_db / 10.0)))
    assert np.sqrt(np.mean(res.residual_phase_deg ** 2)) == pytest.approx(expected_phase_deg, rel=0.25)
    assert res.integrated_snr_db == pytest.approx(res.cell_snr_db + 10.0 * math.log10(CAL_FRAMES))


def test_range_bias_against_the_scene_geometry(calibration):
    res = calibration["result"]
    # the simulated reflector sits exactly at the given range: no bias beyond a fraction of a millimetre
    # (range resolution 0.195 m; the Cramér-Rao bound at this SNR is micrometres, Rife and Boorstyn 1974)
    assert abs(res.range_bias_m) < 1e-3
    # tell it the reflector is 5 cm nearer than it is: the bias is +5 cm
    shifted = calibrate_capture(calibration["capture"], REFLECTOR_RANGE_M - 0.05)
    assert shifted.range_bias_m == pytest.approx(0.05, abs=1e-3)


# ---- what the calibration buys: angles and sidelobes ------------------------------------------

def first_order_azimuth_error_deg(sensor, gains, azimuth_deg):
    """Azimuth bias the channel errors cause, to first order: for small phase errors eps_v the
    single-target maximum-likelihood direction maximises |sum_v a_v exp(j (eps_v - k p_v . d))|, whose
    second-order expansion is a least-squares fit of eps_v by a plane k (x_v du + z_v dw) + c with
    weights a_v (linearised ML / weighted phase fit; common practice)."""
    a, eps = np.abs(gains), np.angle(gains)
    k0 = 2.0 * np.pi / sensor.wavelength_m
    design = np.column_stack([np.ones(len(gains)), k0 * sensor.virtual_positions_m[:, [0, 2]]])
    sw = np.sqrt(a)
    (_, du, dw), *_ = np.linalg.lstsq(design * sw[:, None], eps * sw, rcond=None)
    # snapshot s_v = g_v exp(-j k (u x_v + w z_v)): a phase ramp +k du x_v reads as u - du
    u, w = math.sin(math.radians(azimuth_deg)) - du, -dw
    return math.degrees(math.atan2(u, math.sqrt(1.0 - u * u - w * w))) - azimuth_deg


def test_calibration_removes_the_azimuth_errors(calibration, sensor, gains):
    vector = load_calibration(calibration["path"], sensor)
    raw, cal = Pipeline(sensor), Pipeline(sensor, None, vector)
    err_raw, err_cal, predicted = [], [], []
    for i, az in enumerate(SWEEP_AZIMUTHS_DEG):
        frame = point_frame(sensor, az, gains, seed=100 + i)
        # truth: the scene's azimuth, atan2(x, y) of the target position
        err_raw.append(measured_azimuth(raw, frame) - az)
        err_cal.append(measured_azimuth(cal, frame) - az)
        predicted.append(first_order_azimuth_error_deg(sensor, gains, az))
    err_raw, err_cal = np.array(err_raw), np.array(err_cal)
    # uncalibrated, the chain is off by what the channel errors predict (to first order); a constant
    # bias in u grows as 1 / cos(azimuth) towards the edges of the field of view
    np.testing.assert_allclose(err_raw, predicted, atol=0.1)
    assert np.max(np.abs(err_raw)) > 0.5
    assert max(abs(err_raw[0]), abs(err_raw[-1])) > 1.5 * abs(err_raw[len(err_raw) // 2])
    # calibrated: back within half a degree across -60..60 deg
    assert np.max(np.abs(err_cal)) < 0.5
    assert np.max(np.abs(err_cal)) < np.max(np.abs(err_raw)) / 4


def test_calibration_restores_the_uniform_array_sidelobes(calibration, sensor, gains):
    vector = load_calibration(calibration["path"], sensor)
    ideal_psl = uniform_array_psl_db(8)
    assert -13.3 < ideal_psl < -12.5  # about -13 dB for a rectangular window (Harris 1978)
    frame = point_frame(sensor, 20.0, gains, seed=7)
    snap, row = azimuth_row_snapshot(sensor, frame, SWEEP_RANGE_M)
    assert len(row) == 8
    psl_raw = peak_sidelobe_db(snap[row])
    psl_cal = peak_sidelobe_db((snap * vector)[row])
    assert psl_raw > ideal_psl + 0.5
    assert abs(psl_cal - ideal_psl) < 1.0
    # and without any channel errors the row already shows the uniform array's sidelobe
    clean, _ = azimuth_row_snapshot(sensor, point_frame(sensor, 20.0, np.ones(sensor.n_virtual), seed=7),
                                    SWEEP_RANGE_M)
    assert abs(peak_sidelobe_db(clean[row]) - ideal_psl) < 1.0


def test_ula_of_16_is_calibrated_too(tmp_path):
    # a 4 TX x 4 RX filled row: 16 azimuth elements, no elevation
    ula = make_sensor(n_tx_az=4, n_rx=4, elevation_tx=False)
    g = channel_errors(ula, seed=5)
    cap = write_reflector_capture(tmp_path / "ula.cap", ula, reflector_scene(), 10, g)
    res = calibrate_capture(cap, REFLECTOR_RANGE_M)
    assert res.warnings == []
    est = res.gain / g
    est /= est[0]
    assert np.max(np.abs(np.degrees(np.angle(est)))) < 0.2  # Rife and Boorstyn 1974, as above
    snap, row = azimuth_row_snapshot(ula, point_frame(ula, -25.0, g, seed=3), SWEEP_RANGE_M)
    assert len(row) == 16
    ideal_psl = uniform_array_psl_db(16)  # Dirichlet kernel, Harris 1978
    assert peak_sidelobe_db(snap[row]) > ideal_psl + 0.5
    assert abs(peak_sidelobe_db((snap * res.vector)[row]) - ideal_psl) < 1.0


# ---- warnings ---------------------------------------------------------------------------------

def warned(result, text):
    return any(text in w for w in result.warnings)


def test_weak_reflector_is_refused(tmp_path, sensor, gains):
    # -25 dB per sample + ~32 dB of FFT gain: ~7 dB per frame, ~15 dB over 6 frames, under the limit
    # (the threshold itself is tested in tests/test_calibrate_refusal.py)
    cap = write_reflector_capture(tmp_path / "weak.cap", sensor,
                                  f"[[target]]\nrange_m = {REFLECTOR_RANGE_M}\nsnr_db = -25.0\n", CHECK_FRAMES, gains)
    res = calibrate_capture(cap, REFLECTOR_RANGE_M)
    assert res.integrated_snr_db < MIN_INTEGRATED_SNR_DB
    assert [r for r in res.refusals if r.startswith("reflector too weak: at 5.0")], res.refusals
    assert not warned(res, "too weak")


def test_near_reflector_warns(tmp_path, sensor, gains):
    # 5 range cells of 0.195 m = 0.98 m (c / 2B, Richards 2005) is beyond 0.8 m
    cap = write_reflector_capture(tmp_path / "near.cap", sensor, reflector_scene(0.8, 0.0), CHECK_FRAMES, gains)
    res = calibrate_capture(cap, 0.8)
    assert warned(res, "too near")
    assert not warned(res, "too weak")


def test_second_reflector_close_in_range_warns(tmp_path, sensor, gains):
    extra = "[[target]]\nrange_m = 5.8\nazimuth_deg = 20.0\nrcs_dbsm = 10.0\n"  # 4 range cells further
    cap = write_reflector_capture(tmp_path / "two.cap", sensor, reflector_scene(extra=extra), CHECK_FRAMES, gains)
    res = calibrate_capture(cap, REFLECTOR_RANGE_M)
    assert warned(res, "not alone: another peak at 5.8")


def test_second_reflector_inside_the_range_cell_warns(tmp_path, sensor, gains):
    extra = "[[target]]\nrange_m = 5.2\nazimuth_deg = -25.0\nrcs_dbsm = 3.0\n"  # one range cell further
    cap = write_reflector_capture(tmp_path / "two.cap", sensor, reflector_scene(extra=extra), CHECK_FRAMES, gains)
    res = calibrate_capture(cap, REFLECTOR_RANGE_M)
    assert warned(res, "not alone")


def test_second_reflector_at_the_same_range_warns(tmp_path, sensor, gains):
    extra = "[[target]]\nrange_m = 5.0\nazimuth_deg = 35.0\nrcs_dbsm = 8.0\n"
    cap = write_reflector_capture(tmp_path / "two.cap", sensor, reflector_scene(extra=extra), CHECK_FRAMES, gains)
    res = calibrate_capture(cap, REFLECTOR_RANGE_M)
    assert warned(res, "second angle peak")


def test_dead_channel_warns(tmp_path, sensor, gains):
    g = gains.copy()
    g[5] *= 10.0 ** (-20.0 / 20.0)
    cap = write_reflector_capture(tmp_path / "dead.cap", sensor, reflector_scene(), CHECK_FRAMES, g)
    res = calibrate_capture(cap, REFLECTOR_RANGE_M)
    assert [w for w in res.warnings if w.startswith("channel ")] and warned(res, "channel 5 (TX 1, RX 1)")


def test_reflector_beyond_the_sensor_range_is_an_error(calibration):
    with pytest.raises(CubecastError, match="maximum range"):
        calibrate_capture(calibration["capture"], 100.0)
    with pytest.raises(CubecastError, match="--target-range-m"):
        calibrate_capture(calibration["capture"], -1.0)


# ---- the file ---------------------------------------------------------------------------------

def test_file_round_trip(calibration, sensor):
    res = calibration["result"]
    f = load_calibration_file(calibration["path"], sensor)
    assert f.sensor_id == sensor.sensor_id and f.sensor_digest == sensor.digest
    assert (f.n_tx, f.n_rx) == (sensor.n_tx, sensor.n_rx)
    assert f.frames_used == CAL_FRAMES
    assert f.range_bias_m == pytest.approx(res.range_bias_m, abs=1e-6)
    assert f.target["range_m"] == REFLECTOR_RANGE_M
    vec = load_calibration(calibration["path"], sensor)
    assert vec.dtype == np.complex64 and vec.shape == (sensor.n_virtual,)
    np.testing.assert_allclose(vec, res.vector, rtol=1e-6, atol=1e-6)
    # the vector undoes the gains: gain x vector = 1 on every channel
    np.testing.assert_allclose(f.gain * vec, 1.0, atol=1e-6)


def test_calibration_of_another_sensor_is_rejected(calibration, sensor):
    ula = make_sensor(n_tx_az=4, n_rx=4, elevation_tx=False)
    with pytest.raises(CubecastError, match="16 virtual channels"):
        load_calibration(calibration["path"], ula)
    # same channel count, another chirp: the carrier at the samples moves, and with it every
    # path-length phase between channels
    other = parse_sensor(sensor.source_text.replace("start_frequency_hz = 77.0e9", "start_frequency_hz = 78.0e9"),
                         "other")
    assert other.n_virtual == sensor.n_virtual and other.array_digest != sensor.array_digest
    with pytest.raises(CubecastError, match="array_digest .* chirp, antenna positions, MIMO code or ADC format"):
        load_calibration(calibration["path"], other)
    swapped = parse_sensor(sensor.source_text.replace("swap_iq = false", "swap_iq = true"), "swapped")
    with pytest.raises(CubecastError, match="array_digest"):
        load_calibration(calibration["path"], swapped)


def test_calibration_survives_edits_that_do_not_touch_the_array(calibration, sensor):
    # the link budget, the frame and the id describe the same hardware paths: the file still applies
    text = (sensor.source_text.replace("noise_figure_db = 12.0", "noise_figure_db = 13.0")
            .replace('id = "test-sensor"', 'id = "bench-b"'))
    edited = parse_sensor(text, "edited")
    assert edited.digest != sensor.digest and edited.array_digest == sensor.array_digest
    np.testing.assert_array_equal(load_calibration(calibration["path"], edited),
                                  load_calibration(calibration["path"], sensor))


def test_file_without_array_digest_needs_the_same_description(calibration, sensor, tmp_path):
    # a file written before the array digest existed is checked against the whole description
    lines = [ln for ln in calibration["path"].read_text().splitlines() if not ln.startswith("array_digest")]
    old = tmp_path / "old.toml"
    old.write_text("\n".join(lines) + "\n")
    assert load_calibration_file(old, sensor).array_digest is None
    other = parse_sensor(sensor.source_text.replace("noise_figure_db = 12.0", "noise_figure_db = 13.0"), "other")
    with pytest.raises(CubecastError, match="sensor_digest"):
        load_calibration(old, other)


def test_array_digest_ignores_how_positions_are_written():
    # the same positions in metres ([x, y, z]) or in half-wavelengths ([x, z]) are the same array
    from tests.helpers import sensor_text
    text = sensor_text()
    s_hw = parse_sensor(text, "hw")

    def metres(pos):
        return "[" + ", ".join(f"[{x!r}, {y!r}, {z!r}]" for x, y, z in pos.tolist()) + "]"

    lines = []
    for ln in text.splitlines():
        if ln.startswith("tx_positions_half_wavelength"):
            ln = f"tx_positions_m = {metres(s_hw.tx_positions_m)}"
        elif ln.startswith("rx_positions_half_wavelength"):
            ln = f"rx_positions_m = {metres(s_hw.rx_positions_m)}"
        lines.append(ln)
    s_m = parse_sensor("\n".join(lines), "metres")
    assert s_m.digest != s_hw.digest and s_m.array_digest == s_hw.array_digest


def test_damaged_files_are_rejected(calibration, sensor, tmp_path):
    text = calibration["path"].read_text()
    cases = {
        "missing channel": (text[: text.rindex("[[channel]]")] + text[text.index("[report]"):], "entries"),
        "bad amplitude": (text.replace("gain_amplitude = ", "gain_amplitude = -", 1),
                          r"\[\[channel\]\] #0 gain_amplitude = -[0-9.]+: must be > 0"),
        "bad index": (text.replace("index = 1\n", "index = 2\n", 1), "index"),
        "bad format": (text.replace('format = "cubecast-calibration"', 'format = "other"'), "format"),
        "not toml": ("[calibration\n", "TOML"),
    }
    for name, (body, what) in cases.items():
        p = tmp_path / f"{name}.toml"
        p.write_text(body)
        with pytest.raises(CubecastError, match=what):
            load_calibration(p, sensor)
    with pytest.raises(CubecastError, match="cannot read"):
        load_calibration(tmp_path / "absent.toml", sensor)
    latin1 = tmp_path / "latin1.toml"
    latin1.write_bytes(text.replace("yard-a", "yard-\xe9").encode("latin-1"))
    with pytest.raises(CubecastError, match=r"cannot read calibration .*latin1\.toml: not UTF-8"):
        load_calibration(latin1, sensor)


# ---- command line -----------------------------------------------------------------------------

def cli(argv):
    from cubecast.daemon.cli import main
    return main(argv)


CALIBRATE_LOGGER = "cubecast.daemon.calibrate"


@pytest.fixture
def calibrate_log(caplog, monkeypatch):
    """The calibrate command's log records. The command's own logging set-up (cli.main) stops
    propagation at the `cubecast` logger during the test; caplog attaches its handler to loggers that
    do not propagate when the test starts, so the calibrate logger is made one of those. The
    `cubecast` level (--quiet sets it) is restored after."""
    root = logging.getLogger("cubecast")
    saved = root.level
    monkeypatch.setattr(logging.getLogger(CALIBRATE_LOGGER), "propagate", False)
    yield caplog
    root.setLevel(saved)


def test_cli_writes_the_file_and_a_readable_report(calibration, sensor, tmp_path, capsys, calibrate_log):
    out = tmp_path / "cli.toml"
    rc = cli(["calibrate", str(calibration["capture"]), "--target-range-m", "5", "--out", str(out)])
    assert rc == 0
    assert capsys.readouterr().out == ""  # the report is a log record, not a result on stdout
    records = [r for r in calibrate_log.records if r.name == CALIBRATE_LOGGER]
    assert [r.levelno for r in records] == [logging.INFO, logging.INFO]  # no warning
    report, wrote = (r.getMessage() for r in records)
    for word in ("sensor", "yard-a", "bias", "SNR", "residuals", "azimuth", "channel"):
        assert word in report
    assert wrote == f"wrote {out}"
    assert len([ln for ln in report.splitlines() if ln.startswith("  ") and ln.split()[0].isdigit()]) \
        == sensor.n_virtual
    np.testing.assert_allclose(load_calibration(out, sensor), calibration["result"].vector, atol=1e-6)


def test_cli_warnings_are_logged_and_kept_in_the_file(tmp_path, sensor, gains, capsys, calibrate_log):
    cap = write_reflector_capture(tmp_path / "near.cap", sensor, reflector_scene(0.8, 0.0), 3, gains)
    out = tmp_path / "near.toml"
    assert cli(["calibrate", str(cap), "--target-range-m", "0.8", "--out", str(out), "--quiet"]) == 0
    assert capsys.readouterr().out == ""
    # --quiet: the warnings only, no report and no "wrote" line
    records = [r for r in calibrate_log.records if r.name == CALIBRATE_LOGGER]
    assert records and all(r.levelno == logging.WARNING for r in records)
    assert any(r.getMessage().startswith("cubecast calibrate: warning: reflector too near") for r in records)
    assert any("too near" in w for w in load_calibration_file(out, sensor).warnings)


def test_process_applies_gains_and_range_bias(calibration, tmp_path, calibrate_log):
    # A calibration made with the reflector's range given 5 cm short measures a +5 cm bias; processing
    # with that file puts the reflector at the given range, on boresight (the gains applied).
    short = REFLECTOR_RANGE_M - 0.05
    out = tmp_path / "short.toml"
    assert cli(["calibrate", str(calibration["capture"]), "--target-range-m", str(short), "--out", str(out),
                "--quiet"]) == 0
    pts_csv = tmp_path / "p.npz"
    assert cli(["process", str(calibration["capture"]), "--out", str(pts_csv), "--calibration", str(out),
                "--quiet"]) == 0
    data = np.load(pts_csv)
    best = np.argmax(data["snr_db"])
    assert data["range_m"][best] == pytest.approx(short, abs=0.01)
    assert abs(data["azimuth_deg"][best]) < 0.1 and abs(data["elevation_deg"][best]) < 0.2
