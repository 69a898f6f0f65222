"""The front end (loading, windows, range and Doppler FFTs, detection map) against a direct
computation with scipy.fft, for every input path, I/Q convention, padding and option."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.fft

from cubecast.daemon.chain import fft as chain_fft
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.settings import ProcessingSettings
from cubecast.daemon.simulate import Simulator
from tests.helpers import make_sensor

SCENE = """
[[target]]
range_m = 6.3
azimuth_deg = -11.0
radial_velocity_mps = 2.2
snr_db = 10.0
[[target]]
range_m = 9.8
azimuth_deg = 17.0
rcs_dbsm = 10.0
"""


def reference_spectrum(sensor, frame, settings, pipe):
    """Window over samples and loops (separable), optional removal of each sample's mean over the
    loops of its slot (else, by default, of each channel's complex mean over the frame, its DC, when
    significant), zero
    padding, FFT over samples then loops (scipy.fft): [rx, slot, range, doppler], and the map: sum of
    |X|^2 over channels, Doppler fft-shifted (common practice)."""
    n_slots, n_loops = sensor.n_slots, sensor.n_loops
    x = frame.astype(np.complex128).reshape(n_loops, n_slots, sensor.n_rx, -1)  # [loop, slot, rx, sample]
    if settings.remove_static:
        x = x - x.mean(axis=0, keepdims=True)
    elif settings.dc_removal:  # only a DC beyond five standard errors of the mean, sqrt(var / N)
        mean = x.mean(axis=(0, 1, 3), keepdims=True)
        var = x.var(axis=(0, 1, 3), keepdims=True)
        n = n_loops * n_slots * x.shape[3]
        x = x - np.where(np.abs(mean) ** 2 * n > 25.0 * var, mean, 0.0)
    w_r = pipe.range_fft.window.astype(np.float64)
    w_d = pipe.doppler_fft.window.astype(np.float64)
    x = x * w_r[None, None, None, :] * w_d[:, None, None, None]
    n_r, n_d = pipe.range_fft.fft_size, pipe.doppler_fft.fft_size
    spec = scipy.fft.fft(scipy.fft.fft(x, n=n_r, axis=3), n=n_d, axis=0)  # [doppler, slot, rx, range]
    spec = spec.transpose(2, 1, 3, 0)[:, :, : pipe.range_fft.n_bins, :]
    power = np.fft.fftshift((np.abs(spec) ** 2).sum(axis=(0, 1)), axes=1)
    return spec, power


def check(sensor, settings, raw_path: bool):
    # interference mitigation (which may repair a sample of these scenes) is checked on its own in
    # tests/test_frontend_mitigation.py; here the loading and the FFTs, against scipy
    settings = dataclasses.replace(settings, interference_mitigation="off")
    sim = Simulator(sensor, parse_scene(SCENE), seed=4)
    pipe = Pipeline(sensor, settings)
    for i in range(2):  # twice: buffers reused from one frame to the next must not leak
        raw = sim.raw_frame(i)
        canon = sensor.raw_to_canonical(raw)
        if raw_path:
            pipe.process_raw(raw)
        else:
            pipe.process(canon)
        spec, power = reference_spectrum(sensor, canon, settings, pipe)
        got = pipe.doppler_fft.spectrum
        assert got.shape == spec.shape
        scale = np.abs(spec).max()
        assert np.abs(got - spec).max() <= 2e-6 * scale * np.log2(spec.size)
        np.testing.assert_allclose(pipe.detection_map, power, rtol=1e-3, atol=1e-5 * power.max())


@pytest.mark.parametrize("swap_iq,conjugate", [(False, False), (True, False), (False, True), (True, True)])
@pytest.mark.parametrize("raw_path", [True, False])
def test_iq_conventions_and_input_paths(swap_iq, conjugate, raw_path):
    check(make_sensor(swap_iq=swap_iq, conjugate=conjugate), ProcessingSettings(), raw_path)


@pytest.mark.parametrize("range_fft_size,doppler_fft_size", [(256, 0), (0, 64), (256, 64)])
def test_zero_padding(range_fft_size, doppler_fft_size):
    check(make_sensor(), ProcessingSettings(range_fft_size=range_fft_size, doppler_fft_size=doppler_fft_size),
          True)


@pytest.mark.parametrize("swap_iq", [False, True])
def test_static_removal(swap_iq):
    check(make_sensor(swap_iq=swap_iq, conjugate=True), ProcessingSettings(remove_static=True), True)


@pytest.mark.parametrize("sample_type", ["int16", "float32"])
def test_real_sampling(sample_type):
    check(make_sensor(sampling="real", sample_type=sample_type, samples=256, sample_rate_hz=10.0e6),
          ProcessingSettings(range_fft_size=512), True)


def test_complex_float_input():
    check(make_sensor(sample_type="float32", swap_iq=True), ProcessingSettings(), True)


def test_bpm_slots():
    s = make_sensor(scheme="bpm", n_tx_az=2, elevation_tx=False, bpm_codes=[[1, 1], [1, -1]])
    check(s, ProcessingSettings(), True)


def test_public_fft_fallback_gives_the_same(monkeypatch):
    """Without pocketfft's direct entry point the chain uses scipy.fft.fft and copies: same result."""
    s = make_sensor()
    check(s, ProcessingSettings(doppler_fft_size=64), True)
    monkeypatch.setattr(chain_fft, "DIRECT", False)
    check(s, ProcessingSettings(doppler_fft_size=64), True)


def test_direct_entry_point_checked():
    a = (np.arange(24) + 1j * np.arange(24)[::-1]).astype(np.complex64).reshape(2, 3, 4)
    out = np.zeros((2, 4, 3), np.complex64)
    chain_fft.fft_into(a, out.transpose(0, 2, 1), axis=2)
    np.testing.assert_allclose(out.transpose(0, 2, 1), scipy.fft.fft(a, axis=2), rtol=1e-6, atol=1e-4)
    b = a.copy()
    chain_fft.fft_inplace(b, axis=1)
    np.testing.assert_allclose(b, scipy.fft.fft(a, axis=1), rtol=1e-6, atol=1e-4)


def test_no_frame_sized_allocation_per_frame():
    """After warm-up a frame allocates only per-detection arrays: nothing near the size of the cube
    (numpy reports its allocations to tracemalloc)."""
    import tracemalloc

    from cubecast.daemon.bench import SCENE as BENCH_SCENE
    from cubecast.daemon.bench import sensor_toml
    from cubecast.daemon.sensor import parse_sensor

    s = parse_sensor(sensor_toml("reference"), "bench reference")
    raw = Simulator(s, parse_scene(BENCH_SCENE), seed=1).raw_frame(0)
    pipe = Pipeline(s)
    for _ in range(2):
        pipe.process_raw(raw)
    cube_bytes = pipe.doppler_fft.spectrum.nbytes
    tracemalloc.start()
    try:
        points = pipe.process_raw(raw)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert len(points) >= 3
    # the public-FFT fallback copies each range FFT's output once (one channel's block)
    limit = 64 * 1024 if chain_fft.DIRECT else cube_bytes // s.n_rx + 64 * 1024
    assert peak < limit, f"{peak} bytes allocated while processing one frame ({cube_bytes} bytes cube)"


def test_warm_up_leaves_nothing_to_compile_for_received_frames():
    """serve warms the chain up before it subscribes; a frame then received over ZeroMQ (a writable
    buffer) must find every compiled function ready, or the first real frame waits for numba."""
    import numba
    import zmq

    from cubecast.daemon.chain import angle, cfar, doppler, frontend, mimo, pipeline, points, rangefft

    def signatures():
        return {f"{m.__name__}.{k}": len(v.signatures)
                for m in (angle, cfar, doppler, frontend, mimo, pipeline, points, rangefft)
                for k, v in vars(m).items() if isinstance(v, numba.core.registry.CPUDispatcher)}

    s = make_sensor()
    pipe = Pipeline(s)
    pipe.warm_up()
    before = signatures()
    raw = Simulator(s, parse_scene(SCENE), seed=5).raw_frame(0)
    ctx = zmq.Context()
    a, b = ctx.socket(zmq.PAIR), ctx.socket(zmq.PAIR)
    try:
        a.bind("inproc://warm-up-test")
        b.connect("inproc://warm-up-test")
        a.send(raw.tobytes(), copy=False)
        frame = b.recv(copy=False)
        points_out = pipe.process_raw(np.frombuffer(frame.buffer, raw.dtype).reshape(raw.shape))
    finally:
        a.close(0)
        b.close(0)
        ctx.term()
    assert len(points_out) >= 1
    after = signatures()
    assert {k: v for k, v in after.items() if before.get(k) != v} == {}
