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
