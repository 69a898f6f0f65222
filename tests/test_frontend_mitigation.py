"""The front end's monitors and repairs (chain/frontend.py) against numpy computations of their
definitions (README "Processing settings", "Front-end monitors"), and the repaired spectra against scipy.fft
of frames repaired by hand."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from cubecast.daemon.chain.frontend import NOISE_CELLS, moment_stride
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.settings import ProcessingSettings
from cubecast.daemon.simulate import Simulator
from tests.helpers import make_sensor
from tests.test_frontend import SCENE, reference_spectrum

QUIET = "[[target]]\nrange_m = 9.0\nsnr_db = -40.0\n"  # a scene needs a target: this one is far under the noise


def canonical_count(frame, full_scale):
    return np.count_nonzero((np.abs(frame.real) >= full_scale) | (np.abs(frame.imag) >= full_scale), axis=(0, 2))


@pytest.mark.parametrize("swap_iq,conjugate", [(False, False), (True, True)])
@pytest.mark.parametrize("raw_path", [True, False])
def test_clipped_samples_equal_a_numpy_count(swap_iq, conjugate, raw_path):
    """A complex sample is clipped when I or Q is at or beyond the full scale (README): counted here by
    numpy on the same frame, with a near echo that saturates and hand-set values at, beyond and just
    under the full scale (int16 allows more than 8191)."""
    s = make_sensor(swap_iq=swap_iq, conjugate=conjugate)
    sim = Simulator(s, parse_scene(SCENE + "[[target]]\nrange_m = 3.1\nsnr_db = 62.0\n"), seed=7)
    pipe = Pipeline(s)
    fs = s.adc.full_scale
    for i in range(2):
        raw = sim.raw_frame(i)
        raw[5, 1, 7, 0] = -32768
        raw[6, 2, 9, 1] = 9000
        raw[7, 3, 11, 0] = 8190  # just under: not clipped
        canon = s.raw_to_canonical(raw)
        if raw_path:
            pipe.process_raw(raw)
        else:
            pipe.process(canon)
        expect = canonical_count(canon, fs)
        assert expect.min() > 0
        np.testing.assert_array_equal(pipe.frontend["clipped_samples"], expect)
        assert np.all(pipe.frontend["samples"] == s.chirps_per_frame * s.samples_per_chirp)


def test_dc_offset_measured_and_removed():
    """dc_offset_counts is |mean| of the channel over the frame, estimated from every moment_stride-th
    chirp (numpy on those chirps); a significant DC is removed before the FFTs (the spectrum equals
    scipy.fft of the frame minus that mean), one within five standard errors of the mean, sqrt(var /
    N), is left (the spectrum of the frame as it is)."""
    s = make_sensor()
    sim = Simulator(s, parse_scene(SCENE), seed=3)
    dc = np.array([30.0 - 20.0j, 400.0 + 100.0j, -40.0 + 0.0j, 0.0 + 0.0j])  # counts; the echoes' spread is tens
    frame = (sim.frame(0) + dc[None, :, None]).astype(np.complex64)
    settings = ProcessingSettings(interference_mitigation="off")
    pipe = Pipeline(s, settings)
    pipe.process(frame)
    sub = frame[::moment_stride(*frame.shape[::2])].astype(np.complex128)
    mean = sub.mean(axis=(0, 2))
    np.testing.assert_allclose(pipe.frontend["dc_offset_counts"], np.abs(mean), rtol=1e-4, atol=1e-4)
    whole = frame.astype(np.complex128).mean(axis=(0, 2))  # the frame's own mean, within the estimate's error
    n = sub.shape[0] * sub.shape[2]
    stderr = np.sqrt(sub.var(axis=(0, 2)) / n)
    assert np.all(np.abs(whole - mean) < 5.0 * stderr)
    significant = np.abs(mean) > 5.0 * stderr
    assert list(significant) == [True, True, True, False]  # the last: the echoes' and noise's own mean
    removed = frame - np.where(significant, mean, 0.0)[None, :, None].astype(np.complex64)
    spec, _ = reference_spectrum(s, removed, dataclasses.replace(settings, dc_removal=False), pipe)
    got = pipe.doppler_fft.spectrum
    assert np.abs(got - spec).max() <= 2e-6 * np.abs(spec).max() * np.log2(spec.size)
    # off: the frame as it is
    pipe_off = Pipeline(s, dataclasses.replace(settings, dc_removal=False))
    pipe_off.process(frame)
    spec, _ = reference_spectrum(s, frame, dataclasses.replace(settings, dc_removal=False), pipe_off)
    assert np.abs(pipe_off.doppler_fft.spectrum - spec).max() <= 2e-6 * np.abs(spec).max() * np.log2(spec.size)


def imbalance(frame, g, phi):
    """The convention (README "I/Q imbalance"; Razavi, RF Microelectronics, 2nd ed., 2011): I' = I,
    Q' = g (Q cos phi - I sin phi), per RX."""
    i, q = frame.real.astype(np.float64), frame.imag.astype(np.float64)
    q2 = g[None, :, None] * (q * np.cos(phi)[None, :, None] - i * np.sin(phi)[None, :, None])
    return (i + 1j * q2).astype(np.complex64)


G = 10.0 ** (np.array([1.0, -0.5, 0.0, 2.0]) / 20.0)
PHI = np.radians([5.0, -3.0, 0.0, 10.0])


def test_iq_correction_gives_the_ideal_frame():
    """With the true (g, phi) the corrected frame is the ideal one: the same spectrum as the
    unimpaired frame, to float32 rounding."""
    s = make_sensor()
    ideal = Simulator(s, parse_scene(SCENE), seed=5).frame(0)
    settings = ProcessingSettings(interference_mitigation="off", dc_removal=False)
    corrected = Pipeline(s, settings, iq_imbalance=np.column_stack([G, PHI]))
    corrected.process(imbalance(ideal, G, PHI))
    plain = Pipeline(s, settings)
    plain.process(ideal)
    a, b = corrected.doppler_fft.spectrum, plain.doppler_fft.spectrum
    assert np.abs(a - b).max() <= 1e-5 * np.abs(b).max()


@pytest.mark.parametrize("swap_iq,conjugate", [(False, False), (True, False), (False, True), (True, True)])
def test_iq_correction_in_the_canonical_frame_for_every_adc_convention(swap_iq, conjugate):
    """The board's int16 I/Q (any swap / conjugate convention) is corrected in the canonical frame's I/Q:
    the same spectrum as scipy.fft of the canonical frame corrected by hand, I = I', Q = (Q' / g +
    I' sin phi) / cos phi."""
    s = make_sensor(swap_iq=swap_iq, conjugate=conjugate)
    ideal = Simulator(s, parse_scene(SCENE), seed=6).frame(0)
    raw = s.canonical_to_raw(imbalance(ideal, G, PHI))
    settings = ProcessingSettings(interference_mitigation="off", dc_removal=False)
    pipe = Pipeline(s, settings, iq_imbalance=np.column_stack([G, PHI]))
    pipe.process_raw(raw)
    c = s.raw_to_canonical(raw).astype(np.complex128)
    q = (c.imag / G[None, :, None] + c.real * np.sin(PHI)[None, :, None]) / np.cos(PHI)[None, :, None]
    spec, _ = reference_spectrum(s, c.real + 1j * q, settings, pipe)
    assert np.abs(pipe.doppler_fft.spectrum - spec).max() <= 2e-6 * np.abs(spec).max() * np.log2(spec.size)


def test_iq_imbalance_argument_checked():
    s = make_sensor()
    for bad in (np.ones((3, 2)), [[1.0, 0.0]] * 3 + [[0.0, 0.0]], [[1.0, 0.0]] * 3 + [[1.0, 2.0]]):
        with pytest.raises(CubecastError, match="I/Q imbalance"):
            Pipeline(s, iq_imbalance=bad)
    real = make_sensor(sampling="real", samples=256, sample_rate_hz=10.0e6)
    with pytest.raises(CubecastError, match="samples real"):
        Pipeline(real, iq_imbalance=[[1.1, 0.0]] * 4)


def test_blind_image_rejection_follows_the_formula():
    """image_rejection_db from the moments of every moment_stride-th chirp (DC removed), written out
    here from the blind estimates g = sqrt(E[Q^2] / E[I^2]), sin phi = -E[IQ] / sqrt(E[I^2] E[Q^2])
    and IRR = (1 + 2 g cos phi + g^2) / (1 - 2 g cos phi + g^2) (Razavi 2011); and near the true IRR of
    (g, phi): the image amplitude estimated from N samples has a standard deviation of about
    1 / sqrt(2 N) (delta method on the sample mean of x^2, E|z|^4 = 2 for circular Gaussian z;
    derived for this test), a few tenths of a dB at N = 16384 and an IRR of 15-23 dB."""
    s = make_sensor(loops=128, samples=256, sample_rate_hz=10.0e6)
    noise_only = Simulator(s, parse_scene(QUIET), seed=8).frame(0)
    frame = imbalance(noise_only, G, PHI)
    pipe = Pipeline(s)
    pipe.process(frame)
    stride = moment_stride(*frame.shape[::2])
    assert stride > 1  # a subsample: the estimate is of those chirps
    sub = frame[::stride].astype(np.complex128)
    i = sub.real - sub.real.mean(axis=(0, 2), keepdims=True)
    q = sub.imag - sub.imag.mean(axis=(0, 2), keepdims=True)
    e_ii, e_qq, e_iq = (i * i).mean(axis=(0, 2)), (q * q).mean(axis=(0, 2)), (i * q).mean(axis=(0, 2))
    g = np.sqrt(e_qq / e_ii)
    cos_phi = np.sqrt(1.0 - (e_iq / np.sqrt(e_ii * e_qq)) ** 2)
    blind = 10.0 * np.log10((1 + 2 * g * cos_phi + g * g) / (1 - 2 * g * cos_phi + g * g))
    got = pipe.frontend["image_rejection_db"]
    np.testing.assert_allclose(got[[0, 1, 3]], blind[[0, 1, 3]], atol=1e-3)
    n = sub.shape[0] * sub.shape[2]
    for k in (0, 1, 3):  # rx 2 is balanced: its true IRR is infinite
        gk, ck = G[k], math.cos(PHI[k])
        true = 10.0 * math.log10((1 + 2 * gk * ck + gk * gk) / (1 - 2 * gk * ck + gk * gk))
        nu_over_mu = 10.0 ** (-true / 20.0)
        sigma_db = 20.0 * math.log10(1.0 + 1.0 / math.sqrt(2 * n) / nu_over_mu)
        assert abs(got[k] - true) < 5.0 * sigma_db, (k, got[k], true, sigma_db)
    assert got[2] > 30.0  # a balanced channel: only the estimate's own noise, far above the others


def test_noise_floor_reads_the_noise_variance():
    """White noise of variance s^2 per complex sample reads 10 log10 s^2 (README): the median of NOISE_CELLS
    exponential cells has a relative standard deviation of 1 / (ln 2 sqrt(M)) (the sample median's
    asymptotic variance 1 / (4 M f(m)^2), f(m) = 1/2 for the unit exponential at its median ln 2;
    common practice); s^2 = noise_rms_counts^2 plus the int16 rounding's 2 / 12 counts^2."""
    s = make_sensor()
    sim = Simulator(s, parse_scene(QUIET), seed=9)
    pipe = Pipeline(s)
    readings = []
    for i in range(8):
        pipe.process_raw(sim.raw_frame(i))
        readings.extend(pipe.frontend["noise_floor_db"].tolist())
    expect = 10.0 * math.log10(s.noise_rms_counts ** 2 + 2.0 / 12.0)
    sigma_db = 10.0 / math.log(10.0) / (math.log(2.0) * math.sqrt(NOISE_CELLS))
    readings = np.array(readings)
    assert np.all(np.abs(readings - expect) < 5.0 * sigma_db), (readings, expect, sigma_db)
    assert abs(readings.mean() - expect) < 5.0 * sigma_db / math.sqrt(len(readings))


def add_bursts(frame, rng, n_bursts, length, amplitude):
    """Bursts like a crossing FMCW sweep: a tone whose frequency runs across the band in `length`
    samples, each in its own chirp and RX, away from the chirp's ends. Returns (frame, [(chirp, rx,
    first, last)])."""
    out = frame.copy()
    n_chirps, n_rx, n = frame.shape
    picks = rng.choice(n_chirps * n_rx, n_bursts, replace=False)
    bursts = []
    for p in picks:
        c, r = divmod(int(p), n_rx)
        k0 = int(rng.integers(8, n - length - 8))
        u = np.arange(length)
        phase = 2 * np.pi * (-0.5 * u + 0.5 * u * u / length) + rng.uniform(0, 2 * np.pi)
        out[c, r, k0:k0 + length] += (amplitude * np.exp(1j * phase)).astype(np.complex64)
        bursts.append((c, r, k0, k0 + length - 1))
    return out, bursts


@pytest.mark.parametrize("mode", ["zero", "interpolate"])
def test_synthetic_bursts_flagged_counted_and_repaired(mode):
    """Bursts at 30 dB over the noise (unambiguous, so that the counts are exact), 8 samples long, one
    per chosen chirp and RX: each is one burst of
    8 + 2 x guard flagged samples; the spectrum is scipy.fft of the frame with exactly those samples
    zeroed, or replaced by the mean of the same samples one loop before and after (two loops on one
    side at the first and last loop); no sample is flagged in the frame without them."""
    s = make_sensor()
    settings = ProcessingSettings(interference_mitigation=mode, dc_removal=False)
    guard = settings.interference_guard_samples
    sim = Simulator(s, parse_scene(SCENE), seed=11)
    rng = np.random.default_rng(12)
    pipe = Pipeline(s, settings)
    clean = sim.frame(0)
    pipe.process(clean)
    assert pipe.frontend["interference_samples"].sum() == 0
    floor_clean = pipe.frontend["noise_floor_db"].copy()
    dirty, bursts = add_bursts(clean, rng, 24, 8, 10.0 ** 1.5 * s.noise_rms_counts)
    pipe.process(dirty)
    per_rx = np.bincount([b[1] for b in bursts], minlength=s.n_rx)
    np.testing.assert_array_equal(pipe.frontend["interference_bursts"], per_rx)
    np.testing.assert_array_equal(pipe.frontend["interference_samples"], per_rx * (8 + 2 * guard))
    repaired = dirty.astype(np.complex128)
    n_slots, n_loops = s.n_slots, s.n_loops
    for c, r, a, b in bursts:
        lo, hi = a - guard, b + guard + 1
        if mode == "zero":
            repaired[c, r, lo:hi] = 0
            continue
        p, slot = divmod(c, n_slots)
        pa = p - 1 if p > 0 else p + 2
        pb = p + 1 if p < n_loops - 1 else p - 2
        repaired[c, r, lo:hi] = 0.5 * (dirty[pa * n_slots + slot, r, lo:hi] + dirty[pb * n_slots + slot, r, lo:hi])
    spec, _ = reference_spectrum(s, repaired, dataclasses.replace(settings, dc_removal=False), pipe)
    assert np.abs(pipe.doppler_fft.spectrum - spec).max() <= 2e-6 * np.abs(spec).max() * np.log2(spec.size)
    if mode == "interpolate":  # the floor is back where it was; without mitigation it is not
        assert np.all(np.abs(pipe.frontend["noise_floor_db"] - floor_clean) < 0.5)
        off = Pipeline(s, dataclasses.replace(settings, interference_mitigation="off"))
        off.process(dirty)
        np.testing.assert_array_equal(off.frontend["interference_bursts"], per_rx)
        assert np.mean(off.frontend["noise_floor_db"] - floor_clean) > 1.0



def test_a_burst_on_the_same_samples_of_consecutive_loops_is_zeroed_not_copied():
    """An interferer whose chirps are locked to our loop period puts its bursts on the same samples of
    consecutive loops (with another phase each time). Interpolation takes a flagged sample from the two
    chirps it was compared with, which there hold the burst as well: where those two disagree (their
    difference passes the threshold) the sample is zeroed instead (README "Front-end monitors"); where
    they agree (the guard samples beside the burst) it is interpolated as before. The spectrum is
    scipy.fft of the frame repaired so by hand."""
    s = make_sensor()
    settings = ProcessingSettings(interference_mitigation="interpolate", dc_removal=False)
    guard = settings.interference_guard_samples
    sim = Simulator(s, parse_scene(SCENE), seed=21)
    rng = np.random.default_rng(22)
    pipe = Pipeline(s, settings)
    clean = sim.frame(0)
    n_slots, n_loops = s.n_slots, s.n_loops
    slot, rx, a, length, p0 = 1, 2, 30, 8, 5
    amp = 10.0 ** 1.5 * s.noise_rms_counts
    dirty = clean.copy()
    loops = (p0 - 1, p0, p0 + 1)
    for p in loops:
        phase = rng.uniform(0, 2 * np.pi) + np.pi * np.arange(length) ** 2 / 9.0
        dirty[p * n_slots + slot, rx, a:a + length] += (amp * np.exp(1j * phase)).astype(np.complex64)
    pipe.process(dirty)
    assert pipe.frontend["interference_bursts"].tolist() == [0, 0, 3, 0][: s.n_rx]
    repaired = dirty.astype(np.complex128)
    lo, hi = a - guard, a + length + guard
    for p in loops:
        c = p * n_slots + slot
        pa, pb = (p - 1) * n_slots + slot, (p + 1) * n_slots + slot
        repaired[c, rx, lo:hi] = 0.5 * (dirty[pa, rx, lo:hi] + dirty[pb, rx, lo:hi])  # the guard: interpolated
        repaired[c, rx, a:a + length] = 0  # the burst: its neighbours hold one too
    spec, _ = reference_spectrum(s, repaired, settings, pipe)
    assert np.abs(pipe.doppler_fft.spectrum - spec).max() <= 2e-6 * np.abs(spec).max() * np.log2(spec.size)

def test_settings_checked():
    for kw, field in ((dict(interference_mitigation="median"), "interference_mitigation"),
                      (dict(interference_threshold_db=1.0), "interference_threshold_db"),
                      (dict(interference_guard_samples=-1), "interference_guard_samples"),
                      (dict(leakage_max_range_m=-1.0), "leakage_max_range_m")):
        with pytest.raises(CubecastError, match=field):
            ProcessingSettings(**kw).validate()
