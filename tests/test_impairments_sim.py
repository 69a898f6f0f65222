"""The simulator's impairments (issue 16) against outside facts: the crossing of two FMCW sweeps, the
Butterworth response, the Friis link, the image-rejection ratio, numpy counts; scene-file errors."""

from __future__ import annotations

import filecmp
import math

import numpy as np
import pytest
import scipy.fft

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import capture_sensor, simulate_capture
from cubecast.daemon.scene import load_scene, parse_scene
from cubecast.daemon.sensor import load_sensor
from cubecast.daemon.simulate import Simulator
from tests.helpers import SAMPLES, YARD_SENSOR, make_sensor
from tests.if_reference import butterworth_db

C = 299_792_458.0
K_BOLTZMANN = 1.380649e-23  # J/K (SI, exact since 2019)
TARGET = '[[target]]\nname = "post"\nrange_m = 10.0\nsnr_db = 20.0\n'


def interferer(**fields) -> str:
    base = dict(name="dock", position_m=[9.0, 20.0, 0.5], start_frequency_hz=77.2e9, slope_hz_per_s=22.0e12,
                ramp_time_s=40.0e-6, chirp_period_s=47.0e-6, chirps=0, start_time_s=0.3e-6, inr_db=25.0)
    base.update(fields)
    body = "\n".join(f"{k} = {v!r}".replace("'", '"') for k, v in base.items() if v is not None)
    return f"[[interferer]]\n{body}\n"


def expected_crossings(sensor, itf: dict, d_s: float, frame: int):
    """Independent of the simulator: (chirp m, crossing time from our chirp's start, time into the
    interferer's ramp) where our LO f_c + S t' meets the received interferer chirp f_i + S_i (t - d - T)
    (common practice: the two sweeps' instantaneous frequencies are equal; solved for t), for the
    interferer chirps near each of ours."""
    s = sensor
    out = []
    t0 = itf.get("start_time_s", 0.0)
    for m in range(s.chirps_per_frame):
        t_m = frame * s.frame_period_s + m * s.chirp_period_s
        if itf.get("chirps", 0):
            p0 = math.floor((t_m + s.ramp_end_time_s - t0) / itf["frame_period_s"])
            starts = [t0 + p * itf["frame_period_s"] + q * itf["chirp_period_s"]
                      for p in (p0 - 1, p0) if p >= 0 for q in range(itf["chirps"])]
        else:
            q0 = max(0, math.floor((t_m - d_s - itf["ramp_time_s"] - t0) / itf["chirp_period_s"]))
            starts = [t0 + q * itf["chirp_period_s"] for q in range(q0, q0 + 4)]
        for start in starts:
            # f_c + S (t - t_m) = f_i + S_i (t - d - start)
            t_x = (itf["start_frequency_hz"] - s.start_frequency_hz + s.slope_hz_per_s * t_m
                   - itf["slope_hz_per_s"] * (d_s + start)) / (s.slope_hz_per_s - itf["slope_hz_per_s"])
            out.append((m, t_x - t_m, t_x - d_s - start))
    return out


def sample_of(sensor, t_from_chirp_s: float) -> float:
    return (t_from_chirp_s - sensor.adc_start_delay_s) * sensor.sample_rate_hz


# ---- interference ---------------------------------------------------------------------------------

@pytest.mark.parametrize("chirps,frame_period_s", [(0, None), (40, 0.1001)])
def test_bursts_where_the_sweeps_cross_and_as_long_as_the_band_allows(chirps, frame_period_s):
    # Burst centre: where the two sweeps' instantaneous frequencies cross (expected_crossings).
    # Burst length (common practice): the beat f_b(t) = f_c + S t' - f_i - S_i u changes at the rate
    # S - S_i, so it stays within an IF band |f_b| <= B_IF for 2 B_IF / |S - S_i| seconds. Without the
    # IF filter the band is a brick wall at B_IF = fs (complex sampling): 2 * 5 MHz / 8 MHz/us = 1.25 us,
    # 6.25 samples at 5 MHz; a whole run is 6 or 7 samples.
    s = load_sensor(YARD_SENSOR)
    itf = dict(chirps=chirps, frame_period_s=frame_period_s)
    sim = Simulator(s, parse_scene(TARGET + interferer(**itf)), seed=1, if_filter=False)
    spec = dict(start_frequency_hz=77.2e9, slope_hz_per_s=22.0e12, ramp_time_s=40.0e-6, chirp_period_s=47.0e-6,
                start_time_s=0.3e-6, chirps=chirps, frame_period_s=frame_period_s)
    d_s = float(np.linalg.norm(np.array([9.0, 20.0, 0.5]) - s.rx_positions_m[0])) / C
    for frame in (0, 3):
        bursts = sim.interference_bursts(frame)
        rx0 = bursts[bursts[:, 1] == 0]
        crossings = expected_crossings(s, spec, d_s, frame)
        n_last = s.samples_per_chirp - 1
        half_s = s.if_bandwidth_hz / abs(s.slope_hz_per_s - 22.0e12)
        half = half_s * s.sample_rate_hz
        # a crossing inside the ADC window and the interferer's ramp, its whole band with it: one burst
        # centred on it, 6 or 7 samples long
        whole = [(m, sample_of(s, t)) for m, t, u in crossings
                 if half + 1 < sample_of(s, t) < n_last - half - 1 and half_s < u < 40.0e-6 - half_s]
        assert len(whole) >= 3
        for m, centre in whole:
            row = rx0[rx0[:, 0] == m]
            assert len(row) == 1
            first, last = int(row[0, 2]), int(row[0, 3])
            assert (first + last) / 2 == pytest.approx(centre, abs=1.0)
            assert last - first + 1 in (math.floor(2 * half), math.ceil(2 * half))
        # every burst lies within half a band of a crossing (cut short by the window or a ramp's end)
        for m, first, last in rx0[:, [0, 2, 3]]:
            near = [c for mm, t, u in crossings if mm == m and -half_s <= u <= 40.0e-6 + half_s
                    for c in [sample_of(s, t)] if first - half - 1 <= c <= last + half + 1]
            assert near, (m, first, last)
        # every RX sees the same bursts (the RX are millimetres apart): 4 rows per burst
        assert len(bursts) == s.n_rx * len(rx0)


def test_burst_length_through_the_butterworth_filter_and_the_peak_amplitude():
    # Through the IF filter (quasi-static |H(f_b)|, Butterworth 1930: |H|^2 = 1 / (1 + (f/fc)^(2N)))
    # an interferer of amplitude A is above the noise rms sigma while A^2 |H|^2 > sigma^2, i.e.
    # |f_b| < fc (INR - 1)^(1/(2N)); the run lasts 2 fc (INR - 1)^(1/(2N)) / |S - S_i|. The yard sensor:
    # N = 8, fc = 1.2 x 5 MHz; INR 25 dB: 10.74 samples. At the crossing the amplitude is A = sigma sqrt(INR).
    s = load_sensor(YARD_SENSOR)
    assert s.if_filter_order == 8 and s.if_cutoff_hz == pytest.approx(6.0e6)
    sim = Simulator(s, parse_scene(TARGET + interferer()), seed=1)
    x = sim.interference(0)
    bursts = sim.interference_bursts(0, x)
    inr = 10 ** 2.5
    length = 2 * 6.0e6 * (inr - 1) ** (1 / 16) / 8.0e12 * s.sample_rate_hz
    n_last = s.samples_per_chirp - 1
    full = bursts[(bursts[:, 2] > 0) & (bursts[:, 3] < n_last)]
    assert len(full) >= 3 * s.n_rx
    lengths = full[:, 3] - full[:, 2] + 1
    assert set(lengths.tolist()) <= {math.floor(length), math.ceil(length)}
    peak = np.array([np.abs(x[m, r, a:b + 1]).max() for m, r, a, b in full])
    # the sample nearest the crossing is at most half a sample from it: |f_b| <= 8 MHz/us / (2 fs) = 0.8 MHz
    assert np.all(peak <= 8.0 * math.sqrt(inr) * (1 + 1e-12))
    assert np.all(peak >= 8.0 * math.sqrt(inr) * 10 ** (butterworth_db(8, 6.0e6, 0.8e6)[0] / 20) * (1 - 1e-9))


def test_eirp_level_by_the_one_way_friis_link():
    # Friis ("A note on a simple transmission formula", 1946): Pr = EIRP Gr (lambda / (4 pi R))^2, over
    # the noise k T0 F B with B = fs (Skolnik 2001, the range equation's noise). Without the filter the
    # brick wall passes the crossing at full amplitude sigma sqrt(Pr / N).
    s = load_sensor(YARD_SENSOR)
    eirp_dbm, pos = 13.0, np.array([9.0, 20.0, 0.5])
    sim = Simulator(s, parse_scene(TARGET + interferer(inr_db=None, eirp_dbm=eirp_dbm)), seed=1, if_filter=False)
    lam = C / 77.2e9
    r = float(np.linalg.norm(pos))
    pr_w = 10 ** ((eirp_dbm - 30) / 10) * 10 ** (10.0 / 10) * (lam / (4 * math.pi * r)) ** 2
    noise_w = K_BOLTZMANN * 290.0 * 5.0e6 * 10 ** (12.0 / 10)
    x = sim.interference(0)
    assert np.abs(x).max() == pytest.approx(8.0 * math.sqrt(pr_w / noise_w), rel=1e-9)


def test_interference_adds_to_the_frame_and_is_seeded():
    # the frame is echo + interference + noise: its difference from the same seed's frame without the
    # interferer is the interference (to float32 rounding); another seed gives other phases
    s = load_sensor(YARD_SENSOR)
    with_itf = Simulator(s, parse_scene(TARGET + interferer()), seed=4)
    without = Simulator(s, parse_scene(TARGET), seed=4)
    diff = with_itf.frame(2).astype(np.complex128) - without.frame(2)
    assert np.max(np.abs(diff - with_itf.interference(2))) < 1e-3
    other = Simulator(s, parse_scene(TARGET + interferer()), seed=5).interference(2)
    assert np.array_equal(np.abs(other) > 8.0, np.abs(with_itf.interference(2)) > 8.0)
    assert not np.allclose(other, with_itf.interference(2))


def test_interferer_behind_the_array_is_not_received(caplog):
    s = load_sensor(YARD_SENSOR)
    sim = Simulator(s, parse_scene(TARGET + interferer(position_m=[1.0, -5.0, 0.0])), seed=1)
    assert "behind the array's plane" in caplog.text
    assert not np.any(sim.interference(0)) and len(sim.interference_bursts(0)) == 0
