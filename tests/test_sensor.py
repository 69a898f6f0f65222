"""Sensor description: derived figures against textbook formulas, virtual arrays, validation."""

from __future__ import annotations

import hashlib
import json
import math
import re
import tomllib

import numpy as np
import pytest

from cubecast.daemon.cli import main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.sensor import SPEED_OF_LIGHT_MPS, load_sensor, parse_sensor
from tests.helpers import YARD_SENSOR, make_sensor, sensor_text
from tests.if_reference import butterworth_db

C = 299_792_458.0  # speed of light, exact by the SI definition of the metre


def test_derived_figures_match_textbook_formulas():
    # Richards, Fundamentals of Radar Signal Processing (2005), ch. 4 and 5 (FMCW/LFM relations):
    # range resolution c / (2B); maximum beat frequency = IF bandwidth -> R_max = f_IF c / (2S);
    # Doppler resolution 1 / (N T) -> velocity resolution lambda / (2 N T); unambiguous +-lambda / (4 T).
    s = load_sensor(YARD_SENSOR)
    bandwidth = 30.0e12 * 128 / 5.0e6
    assert s.bandwidth_hz == pytest.approx(bandwidth)
    assert s.range_resolution_m == pytest.approx(C / (2 * bandwidth))
    assert s.max_range_m == pytest.approx(5.0e6 * C / (2 * 30.0e12))
    fc = 77.0e9 + 30.0e12 * (5.0e-6 + 0.5 * 128 / 5.0e6)
    lam = C / fc
    assert s.wavelength_m == pytest.approx(lam)
    t_c, n_tx, loops = 40.0e-6, 3, 32
    # TDM: each TX revisits every N_tx chirps, so the unambiguous velocity is lambda / (4 N_tx T_c)
    assert s.max_velocity_mps == pytest.approx(lam / (4 * n_tx * t_c))
    assert s.velocity_resolution_mps == pytest.approx(lam / (2 * loops * n_tx * t_c))
    assert s.max_velocity_unfolded_mps == pytest.approx(lam / (4 * t_c))
    assert s.chirp_duty_cycle == pytest.approx(32.0e-6 / 40.0e-6)
    assert s.frame_duty_cycle == pytest.approx(96 * 40.0e-6 / 0.1)


def test_range_resolution_worked_example():
    # Common practice worked figure: 4 GHz of sweep gives c / (2 * 4 GHz) = 3.75 cm (from memory).
    s = make_sensor(slope=100.0e12, samples=400, sample_rate_hz=10.0e6)  # 100 MHz/us over 40 us = 4 GHz
    assert s.bandwidth_hz == pytest.approx(4.0e9)
    assert s.range_resolution_m == pytest.approx(0.0375, rel=1e-3)


def test_real_sampling_halves_the_if_band():
    # Nyquist: real sampling at fs covers beat frequencies up to fs / 2 (common practice).
    cplx = make_sensor(sampling="complex")
    real = make_sensor(sampling="real")
    assert real.max_range_m == pytest.approx(cplx.max_range_m / 2)
    assert real.n_range_bins == cplx.n_range_bins // 2


def test_wavelength_at_79_ghz():
    # Common practice: 79 GHz -> lambda ~ 3.8 mm, half-wavelength element spacing ~ 1.9 mm.
    s = make_sensor(f_start_hz=79.0e9 - 30.0e12 * (5.0e-6 + 0.5 * 128 / 5.0e6))
    assert s.center_frequency_hz == pytest.approx(79.0e9)
    assert s.wavelength_m == pytest.approx(3.795e-3, abs=0.005e-3)
    assert s.wavelength_m / 2 == pytest.approx(1.897e-3, abs=0.005e-3)


def _cells(sensor):
    half = sensor.wavelength_m / 2
    pos = sensor.virtual_positions_m
    return sorted(map(tuple, np.round(pos[:, [0, 2]] / half).astype(int).tolist()))


def test_mimo_virtual_array_equals_filled_receive_array():
    # Common practice: 2 TX x 4 RX in TDM, TX 4 half-wavelengths apart, form the same 8-element
    # uniform virtual array as 1 TX x 8 RX; 2 TX x 8 RX (TX 8 apart) give 16 elements.
    mimo = make_sensor(n_tx_az=2, n_rx=4, elevation_tx=False)
    single = make_sensor(n_tx_az=1, n_rx=8, elevation_tx=False)
    assert _cells(mimo) == _cells(single) == [(x, 0) for x in range(8)]
    big = make_sensor(n_tx_az=2, n_rx=8, elevation_tx=False)
    assert _cells(big) == [(x, 0) for x in range(16)]
    va = big.virtual_array()
    assert va["elements"] == va["unique_elements"] == 16 and va["redundant_elements"] == 0
    # Rayleigh resolution at boresight: sin(theta) = lambda / (N d) = 2 / N for d = lambda / 2
    assert va["azimuth_resolution_deg"] == pytest.approx(math.degrees(math.asin(2 / 16)), rel=1e-6)


def test_redundant_elements_counted():
    # TX 2 half-wavelengths apart with 4 RX: virtual x = 0..3 and 2..5 -> 8 elements, 6 unique.
    s = make_sensor(n_tx_az=2, n_rx=4, tx_spacing_hw=2, elevation_tx=False)
    va = s.virtual_array()
    assert (va["elements"], va["unique_elements"], va["redundant_elements"]) == (8, 6, 2)


def test_bundled_array_has_elevation_aperture():
    s = load_sensor(YARD_SENSOR)
    va = s.virtual_array()
    assert va["elements"] == 12 and va["azimuth_columns"] == 8 and va["elevation_rows"] == 2
    assert va["elevation_aperture_m"] == pytest.approx(s.wavelength_m / 2)


def test_describe_cli_text_and_json(capsys):
    assert main(["describe", str(YARD_SENSOR)]) == 0
    text = capsys.readouterr().out
    assert "range resolution" in text and "0.1952 m" in text
    assert main(["describe", str(YARD_SENSOR), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["virtual_array"]["elements"] == 12
    assert d["range_resolution_m"] == pytest.approx(SPEED_OF_LIGHT_MPS / (2 * 768e6))


# ---- validation: every bad field gives its own clear error ---------------------------------------

GOOD = sensor_text()

BAD_CASES = [
    # (substitution on the good text, regex the message must match)
    (("ramp_end_time_s = ", "ramp_end_time_s = 1.0e-6 #"), r"ramp_end_time_s = 1e-06: the ramp must outlast the ADC window"),
    (("chirps_per_frame = 96", "chirps_per_frame = 95"), r"chirps_per_frame = 95: must be a multiple of the 3 MIMO slots"),
    (("rx_positions_half_wavelength = [[0, 0], [1, 0], [2, 0], [3, 0]]", "rx_positions_half_wavelength = [[0, 0], [1, 0, 3]]"),
     r"rx_positions_half_wavelength\[1\] = \[1, 0, 3\]: must be a list of 2 finite numbers"),
    (('tx_order = [0, 1, 2]', 'tx_order = [0, 1, 1]'), r"tx_order = \[0, 1, 1\]: must name each of the 3 TX"),
    (('tx_order = [0, 1, 2]', 'tx_order = [0, 1]'), r"tx_order = \[0, 1\]: must name each of the 3 TX"),
    (('sample_rate_hz = 5000000.0', 'sample_rate_hz = -5.0'), r"\[chirp\] sample_rate_hz = -5.0: must be > 0$"),
    (('samples_per_chirp = 128', 'samples_per_chirp = 12.5'), r"samples_per_chirp = 12.5: must be a whole number"),
    (('sampling = "complex"', 'sampling = "analog"'), r"sampling = 'analog': must be one of 'complex', 'real'"),
    (('sample_type = "int16"', 'sample_type = "int12"'), r"sample_type = 'int12': must be one of 'int16', 'float32'"),
    (('full_scale = 8191', 'full_scale = 40000'), r"full_scale = 40000.0: int16 samples cannot exceed 32767"),
    (('noise_rms_counts = 8.0', 'noise_rms_counts = 9000.0'), r"noise_rms_counts = 9000.0: must be below the ADC full scale"),
    (('frame_period_s = 0.1', 'frame_period_s = 0.001'), r"frame_period_s = 0.001: must be at least chirps_per_frame \* chirp_period_s"),
    (('scheme = "tdm"', 'scheme = "fdm"'), r"scheme = 'fdm': must be one of 'tdm', 'bpm'"),
    (('[link]', '[link]\nantenna_temp = 3'), r"\[link\] unknown field antenna_temp"),
    (('id = "test-sensor"', 'id = "bad id!"'), r"id = 'bad id!': must be 1..64 letters, digits"),
    (('noise_figure_db = 12.0', 'noise_figure_db = "twelve"'), r"noise_figure_db = 'twelve': must be a finite number"),
    (('swap_iq = false', 'swap_iq = "no"'), r"swap_iq = 'no': must be true or false"),
    (('[adc]', '[adcc]\nx = 1\n[adc]'), r"unknown section \[adcc\] \(did you mean \[adc\]\?\)"),
    (('rx_positions_half_wavelength', 'rx_positions_m = [[0.0, 0.0, 0.0]]\nrx_positions_half_wavelength'),
     r"give exactly one of rx_positions_m or rx_positions_half_wavelength"),
    (('[chirp]', '[chirp]\ndesign_max_range_m = 40.0'), r"sample_rate_hz = 5000000.0: too low for design_max_range_m = 40"),
    (('tx_power_dbm = 12.0\n', ''), r"\[link\] tx_power_dbm is missing"),
    (('[antennas]', '[antennas]\nmount_height_m = -1.0'), r"mount_height_m = -1.0: must be >= 0"),
    (('[sensor]', 'sensor = 1\n[sensorx]'), r"unknown section|must be a table"),
    (('chirps_per_frame = 96', 'chirps_per_frame = 96 96'), r"not valid TOML"),
    (('[antennas]', '[antennas]\nfov_half_azimuth_deg = 95.0'), r"\[antennas\] fov_half_azimuth_deg = 95.0: must be in \(0, 90\]"),
    (('id = "test-sensor"', 'id = "test-sensor"\ndescription = 3'), r"\[sensor\] description = 3: must be a string"),
    (('tx_order = [0, 1, 2]', 'tx_order = [0, 1, true]'), r"tx_order = \[0, 1, True\]: must be a list of one or more whole"),
    (('[adc]', '[adc]\nfull_scal = 3'), r"\[adc\] unknown field full_scal \(did you mean full_scale\?\)"),
]


@pytest.mark.parametrize("swap,pattern", BAD_CASES, ids=[p for _, p in BAD_CASES])
def test_bad_sensor_field_named(swap, pattern):
    old, new = swap
    assert old in GOOD, old
    with pytest.raises(CubecastError, match=pattern):
        parse_sensor(GOOD.replace(old, new, 1), "bad.toml")


def test_bpm_codes_validated():
    good = make_sensor(scheme="bpm", elevation_tx=False, bpm_codes=[[1, 1], [1, -1]])
    assert good.n_slots == 2 and good.mimo_scheme == "bpm"
    with pytest.raises(CubecastError, match=r"codes = .*linearly independent"):
        make_sensor(scheme="bpm", elevation_tx=False, bpm_codes=[[1, 1], [1, 1]])
    with pytest.raises(CubecastError, match=r"BPM code entries must be \+1 or -1"):
        make_sensor(scheme="bpm", elevation_tx=False, bpm_codes=[[1, 0], [0, 1]])
    with pytest.raises(CubecastError, match=r"\[mimo\] codes\[1\] = \[1, 'a'\]: must be a list of 2 finite numbers"):
        make_sensor(scheme="bpm", elevation_tx=False, bpm_codes=[[1, 1], [1, "a"]])
    with pytest.raises(CubecastError, match=r"\[mimo\] codes\[0\] = \[1\]: must be a list of 2 finite numbers"):
        make_sensor(scheme="bpm", elevation_tx=False, bpm_codes=[[1], [1, -1]])


def test_cli_bad_sensor_is_one_line_exit_2(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text(GOOD.replace("chirps_per_frame = 96", "chirps_per_frame = 95"))
    assert main(["describe", str(bad)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "chirps_per_frame = 95" in err and "Traceback" not in err
    assert main(["describe", str(tmp_path / "missing.toml")]) == 2
    assert "cannot read sensor description" in capsys.readouterr().err
    latin = tmp_path / "latin1.toml"
    latin.write_bytes(GOOD.replace('"test-sensor"', '"capteur-\xe9"').encode("latin-1"))
    assert main(["describe", str(latin)]) == 2
    assert re.search(r"cannot read sensor description .*latin1\.toml: not UTF-8 text", capsys.readouterr().err)


def test_adc_conventions_round_trip():
    # swap I/Q and conjugate are undone by raw_to_canonical: a board's convention is configuration.
    rng = np.random.default_rng(0)
    frame = (rng.normal(size=(96, 4, 128)) + 1j * rng.normal(size=(96, 4, 128))).astype(np.complex64) * 100
    for swap in (False, True):
        for conj in (False, True):
            s = make_sensor(swap_iq=swap, conjugate=conj)
            raw = s.canonical_to_raw(frame)
            assert raw.dtype == np.int16 and raw.shape == (96, 4, 128, 2)
            back = s.raw_to_canonical(raw)
            assert np.max(np.abs(back - frame)) <= 0.75  # rounding to integers, at most 0.5 per part
    s = make_sensor(swap_iq=True)
    raw = s.canonical_to_raw(np.full((96, 4, 128), 3 + 5j, np.complex64))
    assert raw[0, 0, 0].tolist() == [5, 3]  # I/Q swapped on the wire
    with pytest.raises(CubecastError, match=r"expects shape"):
        s.raw_to_canonical(raw[:, :3])


def test_digest_changes_with_content_not_formatting():
    a = parse_sensor(GOOD)
    b = parse_sensor(GOOD.replace("[link]", "# a comment\n[link]"))
    c = parse_sensor(GOOD.replace("noise_figure_db = 12.0", "noise_figure_db = 13.0"))
    assert a.digest == b.digest != c.digest
    assert re.fullmatch(r"[0-9a-f]{16}", a.digest)


def test_bundled_sensor_digest_unchanged():
    # The digest is the first 16 hex digits of SHA-256 (FIPS 180-4) of the parsed document as sorted
    # JSON; the bundled captures and calibration files record this value for yard_sensor.toml.
    text = YARD_SENSOR.read_text(encoding="utf-8")
    expected = hashlib.sha256(json.dumps(tomllib.loads(text), sort_keys=True).encode()).hexdigest()[:16]
    assert expected == "00677cacdeaf1fdb"
    assert load_sensor(YARD_SENSOR).digest == parse_sensor(text).digest == expected


# ---- plausibility: values no FMCW front end takes, with the unit that was meant -------------------
# The limits are common practice for FMCW automotive and industrial front ends (sensorlimits.py
# gives each with its reason; spans marked there as from memory). Each case is a unit slip of one
# field of the good sensor; the error must name the file, section, field and value, and the hint
# must give back the value of the good sensor.

YARD_TEXT = YARD_SENSOR.read_text(encoding="utf-8")

SLIPS = [
    # (field line in the bundled sensor, the slip, the message after "bad.toml: ", the meant value)
    ("start_frequency_hz = 77.0e9", "start_frequency_hz = 77.0",
     r"\[chirp\] start_frequency_hz = 77.0: far below any radar carrier \(1 GHz .. 300 GHz\); GHz meant\? 77.0e9", 77.0e9),
    ("start_frequency_hz = 77.0e9", "start_frequency_hz = 77000.0",
     r"\[chirp\] start_frequency_hz = 77000.0: far below any radar carrier .*; MHz meant\? 77.0e9", 77.0e9),
    ("start_frequency_hz = 77.0e9", "start_frequency_hz = 77.0e12",
     r"\[chirp\] start_frequency_hz = 77000000000000.0: far above any radar carrier .*; 77.0e9 meant\?", 77.0e9),
    ("slope_hz_per_s = 30.0e12", "slope_hz_per_s = 30.0",
     r"\[chirp\] slope_hz_per_s = 30.0: far below any FMCW chirp slope \(1 MHz/ms .. 1 GHz/us\); MHz/us meant\? 30.0e12",
     30.0e12),
    ("sample_rate_hz = 5.0e6", "sample_rate_hz = 5.0",
     r"\[chirp\] sample_rate_hz = 5.0: far below any radar IF sample rate \(1 kHz .. 1 GHz\); MHz meant\? 5.0e6", 5.0e6),
    ("adc_start_delay_s = 5.0e-6", "adc_start_delay_s = 5.0",
     r"\[chirp\] adc_start_delay_s = 5.0: far above any ADC start delay inside a chirp .*; us meant\? 5.0e-6", 5.0e-6),
    ("ramp_end_time_s = 32.0e-6", "ramp_end_time_s = 32.0",
     r"\[chirp\] ramp_end_time_s = 32.0: far above any chirp \(100 ns .. 100 ms\); us meant\? 32.0e-6", 32.0e-6),
    ("chirp_period_s = 40.0e-6", "chirp_period_s = 40.0",
     r"\[chirp\] chirp_period_s = 40.0: far above any chirp \(100 ns .. 100 ms\); us meant\? 40.0e-6", 40.0e-6),
    # ramp vs the ADC window: 32 ms of ramp for 30.6 us of sampling (ADC delay 5 us + 128 / 5 MHz)
    ("ramp_end_time_s = 32.0e-6\nchirp_period_s = 40.0e-6", "ramp_end_time_s = 32.0e-3\nchirp_period_s = 40.0e-3",
     r"\[chirp\] ramp_end_time_s = 0.032: more than 100 times the end of the ADC window .* = 30.6e-6 s\).*; "
     r"ms meant\? 32.0e-6", None),
    # idle time vs ramp: a 40 ms period around a 32 us ramp
    ("chirp_period_s = 40.0e-6", "chirp_period_s = 40.0e-3",
     r"\[chirp\] chirp_period_s = 0.04: more than 100 times ramp_end_time_s = 32.0e-6 s: an idle gap .*; ms meant\? 40.0e-6",
     40.0e-6),
    # frame period vs chirps x chirp period: milliseconds written as seconds
    ("frame_period_s = 0.1", "frame_period_s = 100",
     r"\[frame\] frame_period_s = 100: far above any real-time frame period \(at most 10 s\); ms meant\? 100.0e-3", 0.1),
]


@pytest.mark.parametrize("good,slip,pattern,meant", SLIPS, ids=[s for _, s, _, _ in SLIPS])
def test_unit_slip_refused_with_the_meant_unit(good, slip, pattern, meant):
    assert good in YARD_TEXT, good
    with pytest.raises(CubecastError, match="^bad\\.toml: " + pattern + "$"):
        parse_sensor(YARD_TEXT.replace(good, slip, 1), "bad.toml")
    if meant is not None:  # the suggested value is the bundled sensor's own (and so it loads)
        field = slip.split(" = ")[0]
        assert tomllib.loads(YARD_TEXT)[("frame" if field == "frame_period_s" else "chirp")][field] == meant


def test_bandwidth_swept_during_sampling_checked():
    # Range resolution c / (2 B) with B = S N / fs (Richards 2005): a slope of 1 MHz/ms (the slowest
    # plausible on its own) over the 25.6 us ADC window sweeps 25.6 kHz, a 5.9 km resolution.
    text = YARD_TEXT.replace("slope_hz_per_s = 30.0e12", "slope_hz_per_s = 1.0e9")
    b = 1.0e9 * 128 / 5.0e6
    with pytest.raises(CubecastError, match=r"^bad\.toml: \[chirp\] slope_hz_per_s = 1000000000.0: the bandwidth swept "
                                            r"during sampling, .* = 25.6e3 Hz \(range resolution 5.85532e3 m\), is below "
                                            r"what FMCW front ends sweep \(1 MHz .. 50 GHz: range resolution 150 m .. 3 mm\)$"):
        parse_sensor(text, "bad.toml")
    assert C / (2 * b) == pytest.approx(5855.32, abs=0.01)
    # and above: 1 GHz/us over a 512-sample window at 1 MHz sweeps 512 GHz
    text = sensor_text(slope=1.0e15, samples=512, sample_rate_hz=1.0e6)
    with pytest.raises(CubecastError, match=r"slope_hz_per_s = 1000000000000000.0: the bandwidth swept during sampling.* "
                                            r"= 512.0e9 Hz .*is above what FMCW front ends sweep"):
        parse_sensor(text)


def test_limits_accept_the_spans_of_the_trade():
    # Common practice (from memory): 24 GHz level gauges with slow sweeps (250 MHz over 10 ms, sampled at
    # 100 kHz), 60 GHz and 79 GHz front ends with fast chirps, a 140 GHz front end sweeping 10 GHz.
    cases = [
        dict(f_start_hz=24.0e9, slope=25.0e9, sample_rate_hz=100.0e3, samples=256, chirp_period_s=3.0e-3, loops=4),
        dict(f_start_hz=60.0e9, slope=60.0e12, sample_rate_hz=10.0e6, samples=256),
        dict(f_start_hz=79.0e9, slope=100.0e12, sample_rate_hz=20.0e6, samples=512),
        dict(f_start_hz=135.0e9, slope=250.0e12, sample_rate_hz=20.0e6, samples=800),
    ]
    for kw in cases:
        s = make_sensor(**kw)
        assert 1.0e6 <= s.bandwidth_hz <= 50.0e9
    assert make_sensor(f_start_hz=135.0e9, slope=250.0e12, sample_rate_hz=20.0e6, samples=800).bandwidth_hz == \
        pytest.approx(10.0e9)


def test_bundled_and_test_sensors_still_load():
    # the bundled sensor, the one every capture in replay_samples/ embeds, the bench's sensors and the
    # test builders' variants used across the suite
    from cubecast.daemon.bench import SENSORS, sensor_toml
    from cubecast.daemon.capture import CaptureReader
    from cubecast.daemon.files import capture_sensor
    load_sensor(YARD_SENSOR)
    for cap in sorted(YARD_SENSOR.parent.glob("*.cap")):
        with CaptureReader(cap) as r:
            assert capture_sensor(r).digest == load_sensor(YARD_SENSOR).digest
    for name in SENSORS:
        parse_sensor(sensor_toml(name), name)
    for kw in (dict(), dict(loops=2, samples=16), dict(sampling="real", samples=256, sample_rate_hz=10.0e6),
               dict(loops=1, n_rx=3, samples=9, sampling="real"), dict(n_tx_az=2, n_rx=2, loops=8, samples=16),
               dict(slope=100.0e12, samples=400, sample_rate_hz=10.0e6)):
        make_sensor(**kw)


# ---- the IF low-pass filter ----------------------------------------------------------------------

def test_if_filter_defaults_and_response_against_scipy():
    s = load_sensor(YARD_SENSOR)
    assert (s.if_filter_order, s.if_filter_default) == (8, True)
    assert s.if_cutoff_hz == pytest.approx(1.2 * 5.0e6)  # 1.2 x the IF band edge (complex sampling: fs)
    assert make_sensor(sampling="real").if_cutoff_hz == pytest.approx(1.2 * 2.5e6)  # real: fs / 2
    f = np.linspace(0.0, 5 * s.if_cutoff_hz, 401)
    ours = 20 * np.log10(s.if_filter_gain(f))
    assert np.max(np.abs(ours - butterworth_db(8, s.if_cutoff_hz, f))) < 1e-6
    # the default's figures in sensor.py's docstring: < 0.02 dB loss up to 85 % of the maximum range,
    # 0.23 dB at the band edge, 35.5 dB at twice the edge's beat frequency, 48 dB at 2.4 times
    edge = s.if_bandwidth_hz
    assert -butterworth_db(8, s.if_cutoff_hz, np.linspace(0, 0.85 * edge, 50)).min() < 0.02
    assert -butterworth_db(8, s.if_cutoff_hz, edge)[0] == pytest.approx(0.23, abs=0.005)
    assert -butterworth_db(8, s.if_cutoff_hz, 2.0 * edge)[0] == pytest.approx(35.5, abs=0.05)
    assert -butterworth_db(8, s.if_cutoff_hz, 2.4 * edge)[0] == pytest.approx(48.2, abs=0.05)
    # far out of band the gain underflows to 0 instead of failing
    assert s.if_filter_gain(1e40) == 0.0


def test_if_filter_given_in_the_file():
    s = parse_sensor(YARD_TEXT + "\n[if_filter]\norder = 4\ncutoff_hz = 5.0e6\n")
    assert (s.if_filter_order, s.if_cutoff_hz, s.if_filter_default) == (4, 5.0e6, False)
    f = np.array([1.0e6, 5.0e6, 12.0e6])
    assert 20 * np.log10(s.if_filter_gain(f)) == pytest.approx(butterworth_db(4, 5.0e6, f), abs=1e-9)
    # the filter changes the description's digest, not the array's (a magnitude common to all channels)
    base = load_sensor(YARD_SENSOR)
    assert s.digest != base.digest and s.array_digest == base.array_digest


IF_FILTER_CASES = [
    ("cutoff_hz = 6.0", r"\[if_filter\] cutoff_hz = 6.0: must lie within 0.1 .. 10 times the IF band edge 5.0e6 Hz "
                        r"\(sample_rate_hz, halved for real sampling\); MHz meant\? 6.0e6$"),
    ("cutoff_hz = 6.0e12", r"\[if_filter\] cutoff_hz = 6000000000000.0: must lie within .*; 6.0e6 meant\?$"),
    ("cutoff_hz = -1.0", r"\[if_filter\] cutoff_hz = -1.0: must be > 0$"),
    ("order = 0", r"\[if_filter\] order = 0: must be in \[1, 16\]$"),
    ("order = 2.5", r"\[if_filter\] order = 2.5: must be a whole number$"),
    ("ordr = 4", r"\[if_filter\] unknown field ordr \(did you mean order\?\)$"),
    # the design range must lie in the filter's pass band: 22 m beats at 4.4 MHz, above a 4 MHz cutoff
    ("cutoff_hz = 4.0e6", r"\[chirp\] design_max_range_m = 22.0: its beat frequency 4.40305e\+06 Hz lies above the IF "
                          r"filter's cutoff 4e\+06 Hz \(\[if_filter\] cutoff_hz\): echoes from there lose over 3 dB$"),
]


@pytest.mark.parametrize("line,pattern", IF_FILTER_CASES, ids=[c for c, _ in IF_FILTER_CASES])
def test_if_filter_fields_validated(line, pattern):
    # beat frequency 2 S R / c (Richards 2005) of the design range: 2 * 30e12 * 22 / c = 4.40305 MHz
    assert 2 * 30.0e12 * 22.0 / C == pytest.approx(4.40305e6, rel=1e-6)
    with pytest.raises(CubecastError, match="^bad\\.toml: " + pattern):
        parse_sensor(YARD_TEXT + f"\n[if_filter]\n{line}\n", "bad.toml")


# ---- describe: no resolution where there is no aperture, never a negative zero ------------------

def test_describe_says_no_aperture_instead_of_90_degrees(capsys):
    # Rayleigh limit in sine space lambda / L (common practice): the bundled array's two rows lambda / 2
    # apart give lambda / L = 1, no resolution; a single row has no elevation aperture at all.
    assert main(["describe", str(YARD_SENSOR)]) == 0
    text = capsys.readouterr().out
    assert "90.00 deg" not in text
    assert "elevation: no elevation aperture that resolves (2 rows over 1.93 mm: measured, not resolved)" in text
    assert load_sensor(YARD_SENSOR).virtual_array()["elevation_resolution_deg"] is None
    one_row = make_sensor(n_tx_az=2, n_rx=4, elevation_tx=False)
    assert one_row.virtual_array()["elevation_resolution_deg"] is None


def test_describe_one_row_cli(tmp_path, capsys):
    path = tmp_path / "row.toml"
    path.write_text(sensor_text(n_tx_az=2, n_rx=4, elevation_tx=False))
    assert main(["describe", str(path)]) == 0
    text = capsys.readouterr().out
    assert "elevation: no elevation aperture (one row)" in text
    # 8 elements at lambda / 2: Rayleigh sin(theta) = 2 / 8 (common practice)
    assert f"azimuth {math.degrees(math.asin(2 / 8)):.2f} deg" in text


def test_describe_never_prints_negative_zero(tmp_path, capsys):
    # positions written as -0.0, and a millimetre-fraction below zero that rounds to zero half wavelengths
    text = sensor_text().replace("tx_positions_half_wavelength = [[0, 0], [4, 0], [2, 1]]",
                                 "tx_positions_m = [[-0.0, -0.0, -0.0], [0.0077332, 0.0, -1.0e-12], "
                                 "[0.0038666, -0.0, 0.0019333]]")
    path = tmp_path / "neg.toml"
    path.write_text(text)
    negative_zero = re.compile(r"(?<![\w.])-0(?:\.0*)?(?![\w.]*[1-9])")
    assert main(["describe", str(path)]) == 0
    out = capsys.readouterr().out
    assert not negative_zero.search(out), out
    assert main(["describe", str(path), "--json"]) == 0
    out = capsys.readouterr().out
    assert not negative_zero.search(out), out

    def walk(v):
        if isinstance(v, dict):
            return [x for w in v.values() for x in walk(w)]
        if isinstance(v, list):
            return [x for w in v for x in walk(w)]
        return [v]
    # the figures themselves, before any output stream (the case above has one: z = -1e-12 m is
    # -5e-10 half wavelengths, -0.0 at six decimals)
    sensor = parse_sensor(text)
    assert math.copysign(1.0, np.round(sensor.virtual_positions_m[:, 2] / (sensor.wavelength_m / 2), 6)[4]) < 0
    floats = [v for v in walk(sensor.describe()) if isinstance(v, float)]
    assert floats and not any(v == 0.0 and math.copysign(1.0, v) < 0 for v in floats)
