"""Signal model and simulator against published relations, and the bundled samples."""

from __future__ import annotations

import filecmp
import functools
import logging
import math
import tomllib

import numpy as np
import pytest
import scipy.fft

from cubecast.daemon import files
from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.cli import main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import capture_sensor, simulate_capture
from cubecast.daemon.scene import load_scene, parse_scene
from cubecast.daemon.sensor import load_sensor
from cubecast.daemon.simulate import Simulator, range_equation_snr_db
from tests.helpers import SAMPLES, YARD_SENSOR, make_sensor
from tests.if_reference import butterworth_db

C = 299_792_458.0


def one_target(**fields) -> str:
    body = "\n".join(f"{k} = {v!r}" for k, v in fields.items())
    return f"[[target]]\n{body}\n"


@pytest.mark.parametrize("range_m", [3.3, 10.0, 17.77])
def test_beat_frequency_is_2SR_over_c(range_m):
    # FMCW beat frequency f_b = 2 S R / c (Richards, Fundamentals of Radar Signal Processing, 2005, ch. 4).
    # Peak located with scipy.fft on a heavily zero-padded single chirp (reference library).
    s = load_sensor(YARD_SENSOR)
    sim = Simulator(s, parse_scene(one_target(range_m=range_m, snr_db=30.0)), noise=False)
    chirp = sim.clean_frame(0)[0, 0]
    n_fft = 1 << 16
    spec = np.abs(scipy.fft.fft(chirp, n_fft))
    f_peak = np.argmax(spec) * s.sample_rate_hz / n_fft
    expected = 2 * s.slope_hz_per_s * range_m / C
    assert f_peak == pytest.approx(expected, abs=s.sample_rate_hz / n_fft)


def test_doppler_phase_progression_is_2v_over_lambda():
    # Chirp-to-chirp phase advance 2 pi (2 v / lambda) T_c (Richards 2005, ch. 5), lambda at the carrier
    # the chirp starts on: the model's f_c * tau term. Measured on the same TX/RX pair across loops.
    s = load_sensor(YARD_SENSOR)
    v = 2.5
    sim = Simulator(s, parse_scene(one_target(range_m=8.0, radial_velocity_mps=v, snr_db=30.0)), noise=False)
    x = sim.clean_frame(0)[0::3, 0, 0]  # TX0's chirps, RX0, first sample
    dphi = np.angle(np.mean(x[1:] * np.conj(x[:-1])))
    lam0 = C / s.start_frequency_hz
    expected = 2 * np.pi * 2 * v / lam0 * s.loop_period_s
    expected = (expected + np.pi) % (2 * np.pi) - np.pi
    assert dphi == pytest.approx(expected, abs=0.02)


def test_angle_phase_between_receivers():
    # Far field: adjacent elements d apart see a phase difference 2 pi d sin(theta) / lambda
    # (common practice); our convention exp(-j k.p) makes a target on the right (+az) lag to the right.
    s = load_sensor(YARD_SENSOR)
    az = 20.0
    sim = Simulator(s, parse_scene(one_target(range_m=12.0, azimuth_deg=az, snr_db=30.0)), noise=False)
    x = sim.clean_frame(0)[0, :, 0]
    dphi = np.angle(x[1] * np.conj(x[0]))
    lam0 = C / s.start_frequency_hz
    d = s.rx_positions_m[1, 0] - s.rx_positions_m[0, 0]
    assert dphi == pytest.approx(-2 * np.pi * d * math.sin(math.radians(az)) / lam0, abs=0.01)


def test_snr_from_range_equation_and_measured_noise():
    # Radar range equation (Skolnik, Introduction to Radar Systems, 3rd ed., 2001, eq. 2.1) with
    # noise power k T0 F B, B = fs; a worked check by hand: R^-4 law -> +12.04 dB for half the range.
    s = load_sensor(YARD_SENSOR)
    snr10 = float(range_equation_snr_db(s, 10.0, 10.0))
    snr5 = float(range_equation_snr_db(s, 5.0, 10.0))
    assert snr5 - snr10 == pytest.approx(40 * math.log10(2), abs=1e-9)
    lam = s.wavelength_m
    k = 1.380649e-23
    pr = (10 ** ((12 - 30) / 10) * 10 * 10 * lam ** 2 * 10) / ((4 * math.pi) ** 3 * 10.0 ** 4 * 10 ** 0.3)
    noise = k * 290 * 5e6 * 10 ** 1.2
    assert snr10 == pytest.approx(10 * math.log10(pr / noise), abs=1e-6)
    # the simulated signal has exactly that per-sample SNR against the simulated noise power
    sim = Simulator(s, parse_scene(one_target(range_m=10.0, rcs_dbsm=10.0)), seed=3)
    clean = sim.clean_frame(0)
    noisy = sim.frame(0).astype(np.complex128)
    p_sig = np.mean(np.abs(clean) ** 2)
    p_noise = np.mean(np.abs(noisy - clean) ** 2)
    assert p_noise == pytest.approx(s.noise_rms_counts ** 2, rel=0.02)
    assert 10 * math.log10(p_sig / s.noise_rms_counts ** 2) == pytest.approx(snr10, abs=0.01)


def test_exact_delay_not_far_field():
    # Near target: the round trip uses exact distances to each antenna, so phase across the array is
    # not exactly linear (a far-field model would be). The second difference of the phase is nonzero.
    s = make_sensor(n_tx_az=1, n_rx=16, elevation_tx=False)
    sim = Simulator(s, parse_scene(one_target(range_m=0.2, azimuth_deg=30.0, snr_db=30.0)), noise=False)
    ph = np.unwrap(np.angle(sim.clean_frame(0)[0, :, 0]))
    assert np.max(np.abs(np.diff(ph, 2))) > 1e-3


def test_deterministic_and_seeded():
    s = load_sensor(YARD_SENSOR)
    scene = load_scene(SAMPLES / "yard_scene.toml")
    a, b = Simulator(s, scene, seed=5), Simulator(s, scene, seed=5)
    assert np.array_equal(a.raw_frame(3), b.raw_frame(3))
    assert not np.array_equal(a.raw_frame(3), Simulator(s, scene, seed=6).raw_frame(3))


def test_quantisation_clips_at_full_scale():
    s = load_sensor(YARD_SENSOR)
    sim = Simulator(s, parse_scene(one_target(range_m=5.0, snr_db=70.0)))  # amplitude ~ 25,000 counts
    raw = sim.raw_frame(0)
    assert raw.dtype == np.int16 and np.max(np.abs(raw)) == 8191


def test_real_sampling_and_bpm_frames():
    real = make_sensor(sampling="real")
    sim = Simulator(real, parse_scene(one_target(range_m=6.0, snr_db=20.0)))
    f = sim.frame(0)
    assert np.all(f.imag == 0)
    raw = sim.raw_frame(0)
    assert raw.shape == (real.chirps_per_frame, real.n_rx, real.samples_per_chirp)
    bpm = make_sensor(scheme="bpm", elevation_tx=False, bpm_codes=[[1, 1], [1, -1]])
    x = Simulator(bpm, parse_scene(one_target(range_m=6.0, snr_db=20.0)), noise=False).clean_frame(0)
    # slot 0 sends TX0 + TX1, slot 1 sends TX0 - TX1; at boresight both TX arrive nearly in phase,
    # so slot 1 nearly cancels: (common practice of BPM codes)
    assert np.mean(np.abs(x[1::2])) < 0.2 * np.mean(np.abs(x[0::2]))


def test_scene_errors_are_named():
    with pytest.raises(CubecastError, match=r"\[\[target\]\] #0 \(a\) position_m = \[1, 2\]: must be a list of 3"):
        parse_scene('[[target]]\nname = "a"\nposition_m = [1, 2]\n')
    with pytest.raises(CubecastError, match=r"\[\[target\]\] #0 mixes the Cartesian fields position_m/velocity_mps "
                                            r"with the polar fields range_m/.*: give either, not both"):
        parse_scene('[[target]]\nposition_m = [1, 2, 3]\nrange_m = 4.0\n')
    with pytest.raises(CubecastError, match=r"\[\[target\]\] #0 unknown field speed"):
        parse_scene('[[target]]\nrange_m = 4.0\nspeed = 3\n')
    with pytest.raises(CubecastError, match=r"\[\[target\]\] #1 unknown field rang_m \(did you mean range_m\?\)"):
        parse_scene('[[target]]\nrange_m = 4.0\n[[target]]\nrang_m = 3.0\n')
    with pytest.raises(CubecastError, match=r"^s\.toml: a scene needs at least one \[\[target\]\]$"):
        parse_scene('[scene]\nname = "empty"\n', "s.toml")
    with pytest.raises(CubecastError, match=r"^s\.toml: \[\[target\]\] #0 \(w\) range_m = -1.0: must be > 0$"):
        parse_scene('[[target]]\nname = "w"\nrange_m = -1.0\n', "s.toml")
    with pytest.raises(CubecastError, match=r"\[\[target\]\] #0 elevation_deg = 91: must be in \[-90, 90\]$"):
        parse_scene('[[target]]\nrange_m = 2.0\nelevation_deg = 91\n')
    with pytest.raises(CubecastError, match=r"position_m = \[0, 0, 0\]: a target cannot sit at the sensor origin$"):
        parse_scene('[[target]]\nposition_m = [0, 0, 0]\n')
    with pytest.raises(CubecastError, match=r"\[\[target\]\] #0 name = 3: must be a string$"):
        parse_scene('[[target]]\nname = 3\nrange_m = 1.0\n')
    with pytest.raises(CubecastError, match=r"\[scene\] name = 3: must be a string$"):
        parse_scene('[scene]\nname = 3\n[[target]]\nrange_m = 1.0\n')
    with pytest.raises(CubecastError, match=r"\[scene\] unknown field nmae \(did you mean name\?\)$"):
        parse_scene('[scene]\nnmae = "yard"\n[[target]]\nrange_m = 1.0\n')
    with pytest.raises(CubecastError, match=r"target = 3: must be an array of tables"):
        parse_scene('target = 3\n')
    with pytest.raises(CubecastError, match=r"unknown section \[targets\] \(did you mean \[target\]\?\)"):
        parse_scene('[[targets]]\nrange_m = 1.0\n')


def test_scene_file_errors_are_named(tmp_path):
    with pytest.raises(CubecastError, match=r"^cannot read scene .*absent\.toml: No such file or directory$"):
        load_scene(tmp_path / "absent.toml")
    latin = tmp_path / "latin1.toml"
    latin.write_bytes('[scene]\nname = "entrepôt"\n[[target]]\nrange_m = 1.0\n'.encode("latin-1"))
    with pytest.raises(CubecastError, match=r"^cannot read scene .*latin1\.toml: not UTF-8 text"):
        load_scene(latin)
    bad = tmp_path / "bad.toml"
    bad.write_text("[[target]]\nrange_m = \n")
    with pytest.raises(CubecastError, match=r"bad\.toml: not valid TOML"):
        load_scene(bad)


def test_simulate_cli_errors(tmp_path, capsys):
    assert main(["simulate", str(SAMPLES / "yard_scene.toml"), "--sensor", str(YARD_SENSOR)]) == 2
    assert "give --out CAPTURE or --pub ENDPOINT" in capsys.readouterr().err


# ---- the bundled samples -----------------------------------------------------------------------

BUNDLED = [("yard.cap", "yard_scene.toml"), ("gate.cap", "gate_scene.toml")]


@pytest.mark.parametrize("capture,scene", BUNDLED)
def test_bundled_sample_regenerates_byte_for_byte(tmp_path, monkeypatch, capture, scene):
    # The bundled captures are recorded files, simulated before the IF filter was modelled: they
    # regenerate byte for byte with the filter left out (and stay as they are).
    monkeypatch.setattr(files, "Simulator", functools.partial(Simulator, if_filter=False))
    with CaptureReader(SAMPLES / capture) as r:
        meta, n = r.metadata, len(r)
        assert r.problems == []
        sensor = capture_sensor(r)
        assert r.sensor_toml == (SAMPLES / "yard_sensor.toml").read_text()
    scene_text = (SAMPLES / scene).read_text()
    assert meta["scene_toml"] == scene_text
    out = tmp_path / capture
    simulate_capture(sensor, parse_scene(scene_text), out, n, seed=meta["seed"])
    assert filecmp.cmp(out, SAMPLES / capture, shallow=False)


def test_bundled_samples_are_small():
    total = sum((SAMPLES / c).stat().st_size for c, _ in BUNDLED)
    assert total <= 8 * 1024 * 1024


@pytest.mark.parametrize("capture,scene", BUNDLED)
def test_bundled_ground_truth_matches_scene(capture, scene):
    with CaptureReader(SAMPLES / capture) as r:
        gt = r.ground_truth
        sensor = capture_sensor(r)
    doc = tomllib.loads((SAMPLES / scene).read_text())
    assert gt["targets"] == [t["name"] for t in doc["target"]]
    sim = Simulator(sensor, load_scene(SAMPLES / scene), if_filter=False)  # recorded without the filter
    for i, rows in enumerate(gt["frames"]):
        assert np.allclose(np.array(rows), sim.truth(i), atol=1e-8)


# ---- the receiver's IF low-pass filter ---------------------------------------------------------
# Reference: scipy.signal's analog Butterworth (tests/if_reference.py); beat frequency f_b = 2 S R / c
# (Richards 2005, ch. 4). The bundled sensor: S = 30 MHz/us, complex sampling at 5 MHz (band edge
# 5 MHz, 24.98 m), default filter order 8 at 1.2 x 5 MHz; real sampling halves the band edge.

def power_ratio_db(sensor, scene_text: str) -> float:
    """Power of the simulated echo with the IF filter over that without, in dB (noise-free frames)."""
    scene = parse_scene(scene_text)
    on = Simulator(sensor, scene, noise=False).clean_frame(0)
    off = Simulator(sensor, scene, noise=False, if_filter=False).clean_frame(0)
    return 10 * math.log10(np.mean(np.abs(on) ** 2) / np.mean(np.abs(off) ** 2))


@pytest.mark.parametrize("sampling,range_m", [("complex", 40.0), ("complex", 60.0), ("complex", 90.0),
                                              ("real", 20.0), ("real", 30.0)])
def test_echo_beyond_the_maximum_range_attenuated_by_the_butterworth_response(sampling, range_m):
    s = make_sensor(sampling=sampling)
    band_edge = 5.0e6 if sampling == "complex" else 2.5e6
    f_b = 2 * 30.0e12 * range_m / C
    assert f_b > band_edge  # beyond the maximum range: the echo folds into the band when sampled
    predicted = butterworth_db(8, 1.2 * band_edge, f_b)[0]
    # exact distances move f_b across the 12 channels by (x^2 / 2R) / R < 1e-7 relative: far inside 0.01 dB
    assert power_ratio_db(s, one_target(range_m=range_m, snr_db=30.0)) == pytest.approx(predicted, abs=0.01)
    assert predicted < -10.0


@pytest.mark.parametrize("range_m", [2.0, 10.0, 17.0, 21.2])
def test_in_band_echo_unchanged_within_the_passband(range_m):
    # A Butterworth is maximally flat (no ripple): in the band the echo loses only the droop |H(f_b)|,
    # below 0.02 dB up to 85 % of the maximum range (21.2 m of 24.98 m) for the default filter.
    s = load_sensor(YARD_SENSOR)
    predicted = butterworth_db(8, 6.0e6, 2 * 30.0e12 * range_m / C)[0]
    measured = power_ratio_db(s, one_target(range_m=range_m, azimuth_deg=20.0, snr_db=30.0))
    assert measured == pytest.approx(predicted, abs=1e-4)
    assert -0.02 < measured <= 0.0


def test_truth_snr_is_after_the_filter():
    # ground truth snr_db: the scene's SNR (before the filter) plus 20 log10 |H(f_b)|
    s = load_sensor(YARD_SENSOR)
    sim = Simulator(s, parse_scene(one_target(range_m=60.0, snr_db=30.0) + one_target(range_m=8.0, snr_db=12.0)))
    snr = sim.truth(0)[:, 10]
    assert snr[0] == pytest.approx(30.0 + butterworth_db(8, 6.0e6, 2 * 30.0e12 * 60.0 / C)[0], abs=1e-6)
    assert snr[1] == pytest.approx(12.0 + butterworth_db(8, 6.0e6, 2 * 30.0e12 * 8.0 / C)[0], abs=1e-6)


def folded_range_m(range_m: float, fs: float = 5.0e6, slope: float = 30.0e12) -> float:
    """Where complex sampling at fs shows a beat 2 S R / c: modulo fs (sampling theorem, common practice)."""
    return ((2 * slope * range_m / C) % fs) * C / (2 * slope)


def test_process_does_not_report_a_folded_echo():
    # 60 m with the 25 m bundled sensor folds to 10.03 m. Without the filter the fold is a strong
    # false target; the default filter takes 48.2 dB off it (scipy), below anything CFAR detects.
    s = load_sensor(YARD_SENSOR)
    scene = parse_scene(one_target(name="far wall", range_m=60.0, azimuth_deg=5.0, rcs_dbsm=30.0))
    alias_m = folded_range_m(60.0)
    assert alias_m == pytest.approx(10.03, abs=0.01)
    pipe = Pipeline(s)

    def near_alias(frame):
        pts = pipe.process(frame)
        return pts[np.abs(pts["range_m"] - alias_m) < 5 * s.range_resolution_m]

    unfiltered = near_alias(Simulator(s, scene, seed=4, if_filter=False).frame(0))
    assert len(unfiltered) and unfiltered["snr_db"].max() > 25.0
    loss_db = -butterworth_db(8, 6.0e6, 2 * 30.0e12 * 60.0 / C)[0]
    assert unfiltered["snr_db"].max() - loss_db < 0.0  # what would remain: below the noise
    sim = Simulator(s, scene, seed=4)
    for i in range(3):
        assert len(near_alias(sim.frame(i))) == 0


def test_target_beyond_the_maximum_range_is_logged(caplog):
    s = load_sensor(YARD_SENSOR)
    with caplog.at_level(logging.WARNING, logger="cubecast.daemon.simulate"):
        Simulator(s, parse_scene('[scene]\nname = "yard"\n' + one_target(name="far wall", range_m=60.0)))
    loss_db = -butterworth_db(8, 6.0e6, 2 * 30.0e12 * 60.0 / C)[0]
    assert [r.getMessage() for r in caplog.records] == [
        f"scene 'yard': target 'far wall' at 60.00 m (t = 0) lies beyond the maximum range 24.98 m: its echo folds to "
        f"{folded_range_m(60.0):.2f} m, attenuated {loss_db:.1f} dB by the IF filter"]


def test_real_sampling_folds_by_mirroring():
    # real sampling at fs: a beat above fs / 2 shows at fs - f (common practice); 20 m beats at 4.0 MHz
    s = make_sensor(sampling="real")
    sim = Simulator(s, parse_scene(one_target(range_m=20.0, snr_db=30.0)), noise=False)
    f_b = 2 * 30.0e12 * 20.0 / C
    assert float(sim.apparent_range_m(20.0)) == pytest.approx((5.0e6 - f_b) * C / (2 * 30.0e12), rel=1e-9)
    spec = np.abs(scipy.fft.fft(sim.frame(0)[0, 0].astype(np.complex128), 1 << 14))[: 1 << 13]
    assert np.argmax(spec) * 5.0e6 / (1 << 14) == pytest.approx(5.0e6 - f_b, abs=5.0e6 / (1 << 14))


# ---- impossible scene values ---------------------------------------------------------------------

SCENE_CASES = [
    ('azimuth_deg = 400', r"azimuth_deg = 400: must be in \[-180, 180\]$"),
    ('azimuth_deg = -180.5', r"azimuth_deg = -180.5: must be in \[-180, 180\]$"),
    ('elevation_deg = -95.0', r"elevation_deg = -95.0: must be in \[-90, 90\]$"),
    ('radial_velocity_mps = -3.0e8', r"radial_velocity_mps = -300000000.0: is not below the speed of light$"),
    ('rcs_dbsm = 100.0', r"rcs_dbsm = 100.0: must be in \[-80, 80\] dBsm .*; 100 m\^2 would be 20.0 dBsm$"),
    ('rcs_dbsm = -90.0', r"rcs_dbsm = -90.0: must be in \[-80, 80\] dBsm \(people .* about 50..60\)$"),
]


@pytest.mark.parametrize("line,pattern", SCENE_CASES, ids=[c for c, _ in SCENE_CASES])
def test_impossible_scene_values_named_with_file_and_target(tmp_path, line, pattern):
    # angles: azimuth = atan2(x, y) in [-180, 180], elevation = asin(z / r) in [-90, 90] (README
    # conventions); no target moves at the speed of light c = 299792458 m/s (SI definition)
    path = tmp_path / "scene.toml"
    path.write_text(f'[[target]]\nname = "w"\nrange_m = 5.0\n[[target]]\nname = "odd"\nrange_m = 8.0\n{line}\n')
    with pytest.raises(CubecastError, match="^" + str(path).replace(".", r"\.") + r": \[\[target\]\] #1 \(odd\) " + pattern):
        load_scene(path)


def test_scene_edges_accepted_and_cartesian_speed_checked():
    for az in (-180.0, 180.0):
        t = parse_scene(one_target(range_m=3.0, azimuth_deg=az)).targets[0]
        assert t.position_m[1] == pytest.approx(-3.0)  # behind the sensor, y = r cos(az)
    with pytest.raises(CubecastError, match=r"\[\[target\]\] #0 velocity_mps = \[250000000.0, 250000000.0, 0.0\]: a "
                                            r"speed of 3.53553e\+08 m/s, not below the speed of light$"):
        parse_scene("[[target]]\nposition_m = [1.0, 5.0, 0.0]\nvelocity_mps = [2.5e8, 2.5e8, 0.0]\n")


def test_target_running_through_the_sensor_refused():
    # 1.019 m ahead, closing at 10 m/s: at frame 1's measurement epoch, 0.1 s + 47.5 chirps of 40 us
    # = 0.1019 s, it sits on TX0 at the origin (chirp 47 starts at 0.10188 s, 0.2 mm away)
    s = load_sensor(YARD_SENSOR)
    sim = Simulator(s, parse_scene('[scene]\nname = "crash"\n[[target]]\nname = "cart"\n'
                                   'position_m = [0.0, 1.019, 0.0]\nvelocity_mps = [0.0, -10.0, 0.0]\n'))
    sim.frame(0)
    sim.truth(0)
    with pytest.raises(CubecastError, match=r"^scene 'crash': target 'cart' comes within 0.0002 m of an antenna at "
                                            r"t = 0.10188 s \(frame 1\): a target must stay at least a wavelength "
                                            r"\(3.87 mm\) from the sensor"):
        sim.frame(1)
    with pytest.raises(CubecastError, match=r"target 'cart' comes within"):
        sim.truth(1)


def test_simulate_cli_refuses_an_impossible_scene(tmp_path, capsys):
    path = tmp_path / "az.toml"
    path.write_text("[[target]]\nrange_m = 10.0\nazimuth_deg = 400\n")
    assert main(["simulate", str(path), "--sensor", str(YARD_SENSOR), "--out", str(tmp_path / "x.cap")]) == 2
    assert f"{path}: [[target]] #0 azimuth_deg = 400: must be in [-180, 180]" in capsys.readouterr().err
    assert not (tmp_path / "x.cap").exists()
