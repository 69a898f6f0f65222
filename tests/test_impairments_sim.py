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


def filtered_chirp_reference(delta_slope: float, rate_hz: float = 1.0e9, span_s: float = 12.0e-6):
    """t -> |y(t)|: the unit chirp exp(j pi dS t^2) (beat frequency dS t, crossing at t = 0) through the
    zero-phase Butterworth |H| of the yard sensor (order 8, 6 MHz: scipy.signal via
    tests/if_reference.py), by FFT on a fine grid; |y| (smooth on the grid's scale) interpolated."""
    n = int(2 * span_s * rate_hz)
    n_fft = 1 << int(math.ceil(math.log2(n)))
    f = np.fft.fftfreq(n_fft, 1 / rate_hz)
    h = 10 ** (butterworth_db(8, 6.0e6, np.abs(f)) / 20)
    t = (np.arange(n) - n // 2) / rate_hz
    y = np.abs(np.fft.ifft(np.fft.fft(np.exp(1j * np.pi * delta_slope * t * t), n_fft) * h)[:n])
    return lambda offsets_s: np.interp(offsets_s, t, y)


@pytest.mark.parametrize("slope_i", [22.0e12, 10.0e12])
def test_bursts_through_the_butterworth_filter_match_scipy(slope_i):
    # Through the IF filter a burst is the mixed chirp filtered by |H| (zero phase, as for echoes):
    # compared with filtered_chirp_reference (scipy's Butterworth, an independent fine-grid FFT) at
    # every sample of bursts well inside the ADC window and the interferer's ramp. For a slow sweep
    # (|S - S_i| = 8e12 Hz/s << B^2 = 3.6e13) the run above the noise rms sigma also has the quasi-static
    # length: A^2 |H(f_b)|^2 > sigma^2 while |f_b| < fc (INR - 1)^(1/(2N)) (Butterworth 1930), so
    # 2 fc (INR - 1)^(1/(2N)) / |S - S_i| = 10.74 samples at INR 25 dB.
    s = load_sensor(YARD_SENSOR)
    assert s.if_filter_order == 8 and s.if_cutoff_hz == pytest.approx(6.0e6)
    sim = Simulator(s, parse_scene(TARGET + interferer(slope_hz_per_s=slope_i)), seed=1)
    spec = dict(start_frequency_hz=77.2e9, slope_hz_per_s=slope_i, ramp_time_s=40.0e-6, chirp_period_s=47.0e-6,
                start_time_s=0.3e-6, chirps=0)
    d_s = float(np.linalg.norm(np.array([9.0, 20.0, 0.5]) - s.rx_positions_m[0])) / C
    inr, amp = 10 ** 2.5, 8.0 * 10 ** 1.25
    ds = s.slope_hz_per_s - slope_i
    quasi_static = 2 * 6.0e6 * (inr - 1) ** (1 / 16) / abs(ds) * s.sample_rate_hz
    t_n = s.adc_start_delay_s + np.arange(s.samples_per_chirp) / s.sample_rate_hz
    reference = filtered_chirp_reference(ds)
    checked = 0
    for frame in range(4):
        x = sim.interference(frame)
        bursts = sim.interference_bursts(frame, x)
        for m, t_x, u in expected_crossings(s, spec, d_s, frame):
            if not (t_n[0] + 4e-6 < t_x < t_n[-1] - 4e-6 and 6e-6 < u < 34e-6):
                continue
            near = np.abs(t_n - t_x) < 3e-6
            ref = amp * reference(t_n[near] - t_x)
            assert np.allclose(np.abs(x[m, 0, near]), ref, rtol=1e-3, atol=1e-3 * amp)
            row = bursts[(bursts[:, 0] == m) & (bursts[:, 1] == 0)]
            assert len(row) == 1
            length = int(row[0, 3] - row[0, 2] + 1)
            assert length == np.count_nonzero(ref > 8.0)  # the reference's run above the noise rms
            assert np.all(np.abs(x[m, 0, ~near]) <= 8.0)
            if abs(ds) < 1e13:
                assert length in (math.floor(quasi_static), math.ceil(quasi_static))
            checked += 1
    assert checked >= 3


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


# ---- clipping --------------------------------------------------------------------------------------

def test_clipped_samples_equal_a_numpy_count_on_the_raw_frame(tmp_path):
    # a near strong echo of amplitude ~ 1.05 x full scale clips on part of its cycle only; the count is
    # per RX, over chirps and samples, of complex samples with |I| or |Q| >= full scale (numpy, by hand)
    s = load_sensor(YARD_SENSOR)
    amp_db = 20 * math.log10(1.05 * 8191 / 8.0)
    scene = parse_scene(f'[[target]]\nrange_m = 3.0\nazimuth_deg = 10.0\nsnr_db = {amp_db!r}\n'
                        '[impairments]\ndc_offset_counts = [[40.0, -25.0], [0, 0], [0, 0], [0, 0]]\n')
    sim = Simulator(s, scene, seed=2)
    raw, report = sim.raw_frame_report(0)
    by_hand = np.count_nonzero((raw[..., 0] >= 8191) | (raw[..., 0] <= -8191)
                               | (raw[..., 1] >= 8191) | (raw[..., 1] <= -8191), axis=(0, 2))
    assert np.array_equal(report, by_hand) and np.array_equal(sim.clipped_samples(0), by_hand)
    assert 0 < by_hand.min() and by_hand.max() < raw.shape[0] * raw.shape[2]  # partly clipped
    # stored per frame in the capture's truth, equal to the count on the frames read back
    out = tmp_path / "clip.cap"
    simulate_capture(s, scene, out, 2, seed=2)
    with CaptureReader(out) as r:
        truth = r.ground_truth["clipped_samples"]
        frames = [f.payload for f in r]
    assert "interference" not in r.ground_truth
    for row, raw in zip(truth, frames):
        assert row == np.count_nonzero(np.abs(raw.astype(np.int32)).max(axis=-1) >= 8191, axis=(0, 2)).tolist()


def test_canonical_capture_counts_its_own_payload(tmp_path):
    # --no-quantize stores unclipped complex64: the truth counts the components at or beyond full scale
    s = load_sensor(YARD_SENSOR)
    scene = parse_scene(f'[[target]]\nrange_m = 3.0\nsnr_db = {20 * math.log10(1.05 * 8191 / 8.0)!r}\n')
    out = tmp_path / "canon.cap"
    simulate_capture(s, scene, out, 1, seed=2, quantize=False)
    with CaptureReader(out) as r:
        x = next(iter(r)).payload
        truth = r.ground_truth["clipped_samples"][0]
    assert truth == np.count_nonzero((np.abs(x.real) >= 8191) | (np.abs(x.imag) >= 8191), axis=(0, 2)).tolist()
    assert min(truth) > 0


def test_a_plain_scene_without_clipping_keeps_the_old_truth(tmp_path):
    # nothing clipped and no impairment sections: the truth is exactly the older schema
    s = load_sensor(YARD_SENSOR)
    out = tmp_path / "plain.cap"
    simulate_capture(s, parse_scene(TARGET), out, 1, seed=1)
    with CaptureReader(out) as r:
        assert sorted(r.ground_truth) == ["columns", "frames", "targets"]


# ---- receiver: I/Q imbalance, DC, leakage --------------------------------------------------------

def bin_centred_tone_scene(k: int, sensor, extra: str = "", snr_db: float = 40.0) -> str:
    # a target whose beat frequency S tau is exactly k fs / N: no spectral leakage between bins
    range_m = k * sensor.sample_rate_hz / sensor.samples_per_chirp * C / (2 * sensor.slope_hz_per_s)
    return f'[[target]]\nrange_m = {range_m!r}\nsnr_db = {snr_db!r}\n' + extra


def test_iq_imbalance_follows_the_convention_and_the_image_matches_the_irr_formula():
    # Convention (the plan): I' = I, Q' = g (Q cos phi - I sin phi). The image of a tone at +f
    # appears at -f with power ratio |nu|^2 / |mu|^2 = (1 - 2 g cos phi + g^2) / (1 + 2 g cos phi + g^2)
    # (image-rejection ratio, common practice; Razavi, RF Microelectronics, 2nd ed., 2011).
    s = load_sensor(YARD_SENSOR)
    gain_db, phase_deg = [1.0, 0.0, -0.5, 0.3], [5.0, 0.0, 0.0, -3.0]  # rx 1 ideal, rx 2 gain only
    extra = f"[impairments]\niq_gain_db = {gain_db}\niq_phase_deg = {phase_deg}\n"
    k = 20
    imp = Simulator(s, parse_scene(bin_centred_tone_scene(k, s, extra)), seed=3)
    ideal = Simulator(s, parse_scene(bin_centred_tone_scene(k, s)), seed=3)
    x, z = imp.frame(0).astype(np.complex128), ideal.frame(0).astype(np.complex128)  # same noise
    g = 10 ** (np.array(gain_db) / 20)[None, :, None]
    phi = np.radians(phase_deg)[None, :, None]
    assert np.allclose(x.real, z.real, atol=1e-3)
    assert np.allclose(x.imag, g * (z.imag * np.cos(phi) - z.real * np.sin(phi)), atol=1e-3)
    clean = Simulator(s, parse_scene(bin_centred_tone_scene(k, s, extra)), noise=False).frame(0).astype(np.complex128)
    spec = np.abs(scipy.fft.fft(clean, axis=-1)) ** 2
    n = s.samples_per_chirp
    measured_db = 10 * np.log10(spec[:, :, n - k] / spec[:, :, k])
    g1, p1 = 10 ** (np.array(gain_db) / 20), np.radians(phase_deg)
    image_over_tone = (1 - 2 * g1 * np.cos(p1) + g1 ** 2) / (1 + 2 * g1 * np.cos(p1) + g1 ** 2)  # 1 / IRR
    for rx in range(4):
        if gain_db[rx] == 0 and phase_deg[rx] == 0:
            assert image_over_tone[rx] == 0 and np.all(measured_db[:, rx] < -100)  # float32 rounding only
        else:
            assert np.allclose(measured_db[:, rx], 10 * np.log10(image_over_tone[rx]), atol=0.01)


def test_dc_offset_is_the_frame_mean():
    # per RX the frame mean is the offset: a bin-centred tone sums to zero over a chirp, the noise mean
    # has a standard deviation sigma / sqrt(2 M N) per component (sigma^2 the complex noise power): +-5 sigma
    s = load_sensor(YARD_SENSOR)
    dc = [[3.0, -2.0], [0.0, 0.0], [10.5, 4.0], [-6.0, 0.5]]
    sim = Simulator(s, parse_scene(bin_centred_tone_scene(13, s, f"[impairments]\ndc_offset_counts = {dc}\n")),
                    seed=4)
    x = sim.frame(0).astype(np.complex128)
    mean = x.mean(axis=(0, 2))
    sd = 8.0 / math.sqrt(2 * s.chirps_per_frame * s.samples_per_chirp)
    assert np.all(np.abs(mean.real - np.array(dc)[:, 0]) < 5 * sd)
    assert np.all(np.abs(mean.imag - np.array(dc)[:, 1]) < 5 * sd)
    one = Simulator(s, parse_scene(bin_centred_tone_scene(13, s, "[impairments]\ndc_offset_counts = [3.0, -2.0]\n")),
                    seed=4).frame(0).astype(np.complex128).mean(axis=(0, 2))
    assert np.all(np.abs(one - (3.0 - 2.0j)) < 5 * sd * math.sqrt(2))


def test_leakage_is_a_static_tone_at_s_tau_l():
    # a static return of delay tau_L beats at S tau_L (Richards, Fundamentals of Radar Signal Processing,
    # 2005, ch. 4: f_b = S tau), the same in every chirp and RX; amplitude full_scale 10^(dBFS/20) times
    # the Butterworth |H| at that frequency (tests/if_reference.py, scipy.signal)
    s = load_sensor(YARD_SENSOR)
    tau, level = 40.0e-9, -30.0
    extra = f"[impairments]\nleakage_level_dbfs = {level}\nleakage_delay_s = {tau}\n"
    a = Simulator(s, parse_scene(bin_centred_tone_scene(40, s, extra)), noise=False).frame(0).astype(np.complex128)
    b = Simulator(s, parse_scene(bin_centred_tone_scene(40, s)), noise=False).frame(0).astype(np.complex128)
    leak = a - b
    assert np.max(np.abs(leak - leak[0, 0][None, None, :])) < 2e-3  # float32 rounding of the frames
    n_fft = 1 << 16
    f_peak = np.argmax(np.abs(scipy.fft.fft(leak[0, 0], n_fft))) * s.sample_rate_hz / n_fft
    assert f_peak == pytest.approx(30.0e12 * tau, abs=s.sample_rate_hz / n_fft)
    t_n = 5.0e-6 + np.arange(s.samples_per_chirp) / s.sample_rate_hz
    amp = np.abs(np.mean(leak[0, 0] * np.exp(-2j * np.pi * 30.0e12 * tau * t_n)))
    expected = 8191 * 10 ** (level / 20) * 10 ** (butterworth_db(8, 6.0e6, 30.0e12 * tau)[0] / 20)
    assert amp == pytest.approx(expected, rel=1e-5)


# ---- scene-file errors ------------------------------------------------------------------------------

@pytest.mark.parametrize("fields,pattern", [
    (dict(inr_db=None), r"\[\[interferer\]\] #0 \(dock\) needs exactly one of inr_db .* and eirp_dbm"),
    (dict(eirp_dbm=20.0), r"\[\[interferer\]\] #0 \(dock\) needs exactly one of inr_db"),
    (dict(chirp_period_s=30.0e-6), r"\[\[interferer\]\] #0 \(dock\) chirp_period_s = 3e-05: must be in \[4e-05, 1\]$"),
    (dict(frame_period_s=0.1), r"\[\[interferer\]\] #0 \(dock\) frame_period_s = 0.1: has no meaning with chirps = 0 \(a continuous "
                               r"interferer\): leave it out$"),
    (dict(chirps=64, frame_period_s=1.0e-3), r"\[\[interferer\]\] #0 \(dock\) frame_period_s = 0.001: must be >= 0.003008$"),
    (dict(chirps=64), r"\[\[interferer\]\] #0 \(dock\) frame_period_s is missing$"),
    (dict(chirps=2.5), r"\[\[interferer\]\] #0 \(dock\) chirps = 2.5: must be a whole number$"),
    (dict(start_frequency_hz=77.0), r"\[\[interferer\]\] #0 \(dock\) start_frequency_hz = 77.0: must be in \[1e\+09, 3e\+11\]$"),
    (dict(position_m=[1.0, 2.0]), r"\[\[interferer\]\] #0 \(dock\) position_m = \[1.0, 2.0\]: must be a list of 3 finite numbers$"),
    (dict(inr=3.0), r"\[\[interferer\]\] #0 unknown field inr \(did you mean inr_db\?\)$"),
])
def test_interferer_errors_name_file_section_field_value_rule(fields, pattern):
    with pytest.raises(CubecastError, match=r"^s\.toml: " + pattern):
        parse_scene(TARGET + interferer(**fields), "s.toml")


@pytest.mark.parametrize("body,pattern", [
    ("leakage_level_dbfs = -20.0", r"\[impairments\] leakage needs both leakage_level_dbfs and leakage_delay_s$"),
    ("leakage_level_dbfs = -20.0\nleakage_delay_s = -1e-9",
     r"\[impairments\] leakage_delay_s = -1e-09: must be in \[0, 1e-06\]$"),
    ("iq_phase_deg = [1.0, 50.0, 0.0, 0.0]",
     r"\[impairments\] iq_phase_deg = \[1.0, 50.0, 0.0, 0.0\]: every value must be in \[-45, 45\]$"),
    ("iq_gain_db = 7.0", r"\[impairments\] iq_gain_db = 7.0: must be in \[-6, 6\]$"),
    ("iq_gain_db = [0.5, 'x']", r"\[impairments\] iq_gain_db = \[0.5, 'x'\]: must be a list of one or more finite"),
    ("dc_offset_counts = [[1.0, 2.0], [3.0]]",
     r"\[impairments\] dc_offset_counts\[1\] = \[3.0\]: must be a list of 2 finite numbers$"),
    ("dc_offset_counts = [1.0, 2.0, 3.0]",
     r"\[impairments\] dc_offset_counts = \[1.0, 2.0, 3.0\]: must be a list of 2 finite numbers$"),
    ("dc_ofset_counts = [1.0, 2.0]", r"\[impairments\] unknown field dc_ofset_counts \(did you mean dc_offset_counts\?\)$"),
])
def test_impairment_errors_name_file_section_field_value_rule(body, pattern):
    with pytest.raises(CubecastError, match=r"^s\.toml: " + pattern):
        parse_scene(TARGET + "[impairments]\n" + body + "\n", "s.toml")


@pytest.mark.parametrize("body,pattern", [
    ("iq_gain_db = [0.5, 0.0, 0.2]", r"iq_gain_db = \[0.5, 0.0, 0.2\]: has 3 entries, sensor 'yard-a' has 4 RX: "
                                     r"give one per RX \(or a single one for every RX\)$"),
    ("dc_offset_counts = [[1.0, 2.0], [3.0, 4.0]]", r"dc_offset_counts = \[\[1.0, 2.0\], \[3.0, 4.0\]\]: has 2 entries"),
    ("iq_phase_deg = [1, 2, 3, 4, 5]", r"iq_phase_deg = \[1.0, 2.0, 3.0, 4.0, 5.0\]: has 5 entries"),
    ("dc_offset_counts = [9000.0, 0.0]", r"dc_offset_counts = \[\[9000.0, 0.0\]\]: every value must be below the ADC "
                                         r"full scale 8191 of sensor 'yard-a'$"),
])
def test_per_rx_lists_checked_against_the_sensor(body, pattern):
    s = load_sensor(YARD_SENSOR)
    scene = parse_scene(TARGET + "[impairments]\n" + body + "\n", "s.toml")
    with pytest.raises(CubecastError, match=r"^s\.toml: \[impairments\] " + pattern):
        Simulator(s, scene)


def test_a_real_sampling_sensor_refuses_a_q_branch_impairment():
    real = make_sensor(sampling="real")
    with pytest.raises(CubecastError, match=r"^s\.toml: \[impairments\] iq_phase_deg: sensor 'test-sensor' samples "
                                            r"real \(one branch, no Q\): must be 0$"):
        Simulator(real, parse_scene(TARGET + "[impairments]\niq_phase_deg = 2.0\n", "s.toml"))
    sim = Simulator(real, parse_scene(TARGET + "[impairments]\ndc_offset_counts = [5.0, 0.0]\n"), seed=1)
    assert np.all(sim.frame(0).imag == 0)


def test_interferer_at_a_receive_antenna_refused():
    s = load_sensor(YARD_SENSOR)
    with pytest.raises(CubecastError, match=r"interferer 'dock' at \[0.0, 0.0, 0.0\] is within a wavelength"):
        Simulator(s, parse_scene(TARGET + interferer(position_m=[0.0, 0.0, 0.0])))


# ---- the bundled interfered capture -----------------------------------------------------------------

def test_bundled_interfered_capture_regenerates_byte_for_byte(tmp_path):
    # simulated with the IF filter (unlike yard.cap and gate.cap); the command is in DEVELOPERS.md
    cap = SAMPLES / "yard_interfered.cap"
    with CaptureReader(cap) as r:
        meta, n, truth = r.metadata, len(r), r.ground_truth
        assert r.problems == [] and r.sensor_toml == YARD_SENSOR.read_text()
        sensor = capture_sensor(r)
        payloads = [f.payload for f in r]
    scene_text = (SAMPLES / "yard_interfered_scene.toml").read_text()
    assert meta["scene_toml"] == scene_text and n == 5
    out = tmp_path / "yard_interfered.cap"
    simulate_capture(sensor, load_scene(SAMPLES / "yard_interfered_scene.toml"), out, n, seed=meta["seed"])
    assert filecmp.cmp(out, cap, shallow=False)
    # the truth holds: every frame has bursts on every RX, none clipped (numpy on the payloads)
    bursts = truth["interference"]["frames"]
    assert truth["interference"]["columns"] == ["chirp", "rx", "first_sample", "last_sample"]
    for frame, raw, clipped in zip(bursts, payloads, truth["clipped_samples"]):
        rows = np.array(frame)
        assert all(np.count_nonzero(rows[:, 1] == rx) >= 5 for rx in range(4))
        assert clipped == np.count_nonzero(np.abs(raw.astype(np.int32)).max(axis=-1) >= 8191, axis=(0, 2)).tolist()


def test_bundled_interfered_scene_is_the_yard_plus_one_interferer():
    yard, interfered = load_scene(SAMPLES / "yard_scene.toml"), load_scene(SAMPLES / "yard_interfered_scene.toml")
    assert [(t.name, t.position_m.tolist(), t.velocity_mps.tolist(), t.rcs_dbsm) for t in yard.targets] == \
        [(t.name, t.position_m.tolist(), t.velocity_mps.tolist(), t.rcs_dbsm) for t in interfered.targets]
    assert len(interfered.interferers) == 1 and interfered.interferers[0].inr_db == 25.0


def test_replay_samples_stay_within_8_mib():
    assert sum(p.stat().st_size for p in SAMPLES.iterdir() if p.is_file()) <= 8 * 1024 * 1024


def test_info_names_the_impairment_truth():
    from cubecast.daemon.info import capture_info, format_info
    d = capture_info(SAMPLES / "yard_interfered.cap")
    with CaptureReader(SAMPLES / "yard_interfered.cap") as r:
        n_bursts = sum(len(f) for f in r.ground_truth["interference"]["frames"])
    assert d["ground_truth"]["interference_bursts"] == n_bursts and d["ground_truth"]["clipped_samples"] == 0
    assert f"no sample clipped; {n_bursts} interference bursts (runs per chirp and RX) from dock 5 sensor" \
        in format_info(d)


# ---- phase noise -----------------------------------------------------------------------------------

@pytest.mark.parametrize("range_m", [8.0, 19.0])
def test_phase_noise_residual_grows_with_the_delay(range_m):
    # Wiener phase (a free-running oscillator's Lorentzian line, common practice): increments over T have
    # variance D T, and the single-sideband level far from the carrier is L(f) = D / (4 pi^2 f^2), so
    # D = 4 pi^2 f^2 10^(L/10). An echo of delay tau keeps phi(t) - phi(t - tau) (range correlation,
    # common practice): variance D tau per sample, independent from sample to sample while tau < 1 / fs.
    # The sample variance of n Gaussian values has a relative sd sqrt(2 / n): +-5 sd.
    s = load_sensor(YARD_SENSOR)
    level, offset = -80.0, 1.0e6
    extra = f"[impairments]\nphase_noise_dbc_per_hz = {level}\nphase_noise_offset_hz = {offset}\n"
    scene = f'[[target]]\nrange_m = {range_m}\nsnr_db = 40.0\n'
    noisy = Simulator(s, parse_scene(scene + extra), seed=7, noise=False).frame(0).astype(np.complex128)
    clean = Simulator(s, parse_scene(scene), seed=7, noise=False).frame(0).astype(np.complex128)
    residual = np.angle(noisy[:, 0, :] * np.conj(clean[:, 0, :])).ravel()
    tau = 2 * range_m / C
    assert tau < 1 / s.sample_rate_hz
    d = 4 * math.pi ** 2 * offset ** 2 * 10 ** (level / 10)
    n = residual.size
    assert abs(residual.mean()) < 5 * math.sqrt(d * tau / n)
    assert np.var(residual) == pytest.approx(d * tau, rel=5 * math.sqrt(2 / n))
    # one LO: every RX sees the same residual (to float32 rounding)
    other = np.angle(noisy[:, 3, :] * np.conj(clean[:, 3, :])).ravel()
    assert np.max(np.abs(other - residual)) < 1e-3


def test_phase_noise_fields_come_in_pairs():
    with pytest.raises(CubecastError, match=r"^s\.toml: \[impairments\] phase noise needs both "
                                            r"phase_noise_dbc_per_hz and phase_noise_offset_hz$"):
        parse_scene(TARGET + "[impairments]\nphase_noise_dbc_per_hz = -80.0\n", "s.toml")
    with pytest.raises(CubecastError, match=r"phase_noise_dbc_per_hz = -10.0: must be in \[-200, -20\]$"):
        parse_scene(TARGET + "[impairments]\nphase_noise_dbc_per_hz = -10.0\nphase_noise_offset_hz = 1e6\n")


def test_platform_frame_interferer_seen_through_the_pose():
    # a platform-frame position p is p_s = R^T (p - t) in the sensor frame (the pose: platform = R sensor + t)
    s = load_sensor(SAMPLES / "tractor_right_sensor.toml")
    p = np.array([14.0, 6.0, 1.2])
    in_sensor = s.pose_rotation.T @ (p - s.pose_position_m)
    assert in_sensor[1] > 0  # in front of this sensor
    target = '[[target]]\nposition_m = [3.0, 9.0, 0.0]\nsnr_db = 20.0\n'
    on_platform = parse_scene('[scene]\nframe = "platform"\n' + target + interferer(position_m=p.tolist()))
    x = Simulator(s, on_platform, seed=1).interference(0)
    y = Simulator(s, parse_scene(TARGET + interferer(position_m=in_sensor.tolist())), seed=1).interference(0)
    assert np.abs(x).max() > 8.0 and np.allclose(x, y, atol=1e-6 * np.abs(x).max())


def test_simulate_command_names_a_bad_impairment_and_writes_nothing(tmp_path, capsys):
    from cubecast.daemon.cli import main
    scene = tmp_path / "scene.toml"
    scene.write_text(TARGET + "[impairments]\niq_gain_db = [0.5, 0.0]\n")
    out = tmp_path / "x.cap"
    assert main(["simulate", str(scene), "--sensor", str(YARD_SENSOR), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"cubecast simulate: error: {scene}: [impairments] iq_gain_db = [0.5, 0.0]: has 2 entries, sensor "
                   "'yard-a' has 4 RX: give one per RX (or a single one for every RX)"]
    assert not out.exists()
