"""The benchmark: the chain on simulated frames for two sensors, against the FFT floor.

For each sensor, in a fresh process (so that peak memory and start-up are its own):
  - first_frame_s: from the start of the process (interpreter, imports, numba functions loaded
    from the cache, CFAR thresholds designed, the chain warmed up on a zero frame) to the first
    point cloud of a real frame, leaving out only the time the benchmark spends simulating its
    input; first_frame_in_process_s is the part from building the chain on;
  - per-stage milliseconds, median over the measured frames after warm-up; the input is the board's
    int16 I/Q, converted inside the range stage;
  - the FFT floor: only the range and Doppler FFTs of the same cube with scipy.fft, one thread;
  - frames per second on one core, peak resident memory.
Speed targets live here, never as timed assertions in tests.

`bench --accuracy` (run_accuracy) measures instead what the points are worth: the Monte Carlo of
accuracy.py on the reference sensor and the bundled yard sensor, RMSE against the Cramér-Rao
bounds and against the reported sigmas per integrated SNR, in this process. `bench --resolution`
(resolution.py) measures how often the angle stage resolves sources sharing a cell.
"""

from __future__ import annotations

import json
import logging
import os
import resource
import statistics
import subprocess
import sys
import time

import numpy as np

from .errors import CubecastError

log = logging.getLogger(__name__)

SENSORS = {
    # 3 TX x 4 RX TDM, 128 loops, 256 samples, int16 I/Q: a common bench configuration
    "reference": dict(tx="[[0, 0], [4, 0], [2, 1]]", rx="[[0, 0], [1, 0], [2, 0], [3, 0]]", loops=128,
                      samples=256),
    # 12 TX x 16 RX TDM, 64 loops, 256 samples: 9 TX on the azimuth row 16 half-wavelengths apart
    # (a 144-element filled row) and 3 TX raised by 1, 2 and 3 half-wavelengths
    "large": dict(tx="[" + ", ".join(f"[{16 * k}, 0]" for k in range(9)) + ", [56, 1], [64, 2], [72, 3]]",
                  rx="[" + ", ".join(f"[{l}, 0]" for l in range(16)) + "]", loops=64, samples=256),
}

SCENE = """
[[target]]
range_m = 7.3
azimuth_deg = -20.0
radial_velocity_mps = 3.1
rcs_dbsm = 5.0
[[target]]
range_m = 12.9
azimuth_deg = 14.0
elevation_deg = 6.0
radial_velocity_mps = -1.2
rcs_dbsm = 0.0
[[target]]
position_m = [-5.0, 16.0, 0.5]
rcs_dbsm = 12.0
[[target]]
position_m = [3.0, 20.0, 3.5]
rcs_dbsm = 8.0
[[target]]
range_m = 30.0
azimuth_deg = 35.0
radial_velocity_mps = 9.0
rcs_dbsm = 10.0
"""


def sensor_toml(name: str) -> str:
    spec = SENSORS[name]
    n_tx = spec["tx"].count("[") - 1
    samples = spec["samples"]
    fs = 10.0e6
    window = samples / fs
    chirp_period = 5.0e-6 + window + 10.0e-6
    chirps = spec["loops"] * n_tx
    return f"""
[sensor]
id = "bench-{name}"

[chirp]
start_frequency_hz = 77.0e9
slope_hz_per_s = 30.0e12
sample_rate_hz = {fs!r}
samples_per_chirp = {samples}
adc_start_delay_s = 5.0e-6
ramp_end_time_s = {5.0e-6 + window + 2.0e-6!r}
chirp_period_s = {chirp_period!r}

[frame]
chirps_per_frame = {chirps}
frame_period_s = {max(0.05, chirps * chirp_period * 1.2)!r}

[antennas]
tx_positions_half_wavelength = {spec["tx"]}
rx_positions_half_wavelength = {spec["rx"]}

[mimo]
scheme = "tdm"

[link]
tx_power_dbm = 12.0
tx_gain_dbi = 10.0
rx_gain_dbi = 10.0
noise_figure_db = 12.0
system_loss_db = 3.0
noise_rms_counts = 8.0

[adc]
sampling = "complex"
sample_type = "int16"
full_scale = 8191
"""


BLOCK = 5  # chain frames, then as many FFT-floor runs, alternately
SPAWN_ENV = "CUBECAST_BENCH_SPAWNED"  # wall clock (s) at which run() started the measuring process


def _median_ms(samples: list[float]) -> float:
    return round(statistics.median(samples) * 1e3, 4)


def measure(name: str, frames: int = 60, distinct: int = 4) -> dict:
    """Run in the current process: build, warm up, measure. Returns the sensor's result row."""
    import scipy.fft

    from .chain.pipeline import STAGES, Pipeline
    from .scene import parse_scene
    from .sensor import parse_sensor
    from .simulate import Simulator

    t_sim = time.perf_counter()
    sensor = parse_sensor(sensor_toml(name), f"bench sensor {name}")
    sim = Simulator(sensor, parse_scene(SCENE), seed=1)
    raws = [sim.raw_frame(i) for i in range(distinct)]  # input as the board delivers it
    t_start = time.perf_counter()
    simulating_s = t_start - t_sim

    pipe = Pipeline(sensor)
    canon = np.empty((sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp), np.complex64)
    pipe.process_raw(np.zeros_like(raws[0]))  # warm-up: numba from cache, FFT plans
    points = pipe.process_raw(raws[0])
    first_frame_in_process_s = time.perf_counter() - t_start
    spawned = os.environ.get(SPAWN_ENV)  # the parent's clock when it started this process
    first_frame_s = (time.time() - float(spawned) - simulating_s) if spawned else first_frame_in_process_s

    for i in range(5):  # settle caches
        pipe.process_raw(raws[i % distinct])

    # the FFT floor: range FFT over samples and Doppler FFT over loops of the same cube, nothing else.
    # Chain and floor alternate in blocks of BLOCK runs, each timed on its own: both see the same
    # machine load (blocks last tens of milliseconds), and both are timed in their own steady state
    # (only the first run of a block starts with the other's data in the caches; medians ignore it)
    sensor.raw_to_canonical(raws[0], canon)
    cube = canon.copy()
    n_ch, n_range, n_loops = sensor.n_slots * sensor.n_rx, pipe.range_fft.n_bins, sensor.n_loops
    dcube = np.zeros((n_ch, n_range, n_loops), np.complex64)

    stage = {s: [] for s in STAGES}
    total = []
    floor = []
    n_points = []
    i = 0
    while i < frames:
        for _ in range(min(BLOCK, frames - i)):
            t0 = time.perf_counter()
            pts = pipe.process_raw(raws[i % distinct])
            t2 = time.perf_counter()
            for s in STAGES:
                stage[s].append(pipe.stage_ms[s] / 1e3)
            total.append(t2 - t0)
            n_points.append(len(pts))
            i += 1
        for _ in range(BLOCK):
            cube[...] = canon
            t0 = time.perf_counter()
            scipy.fft.fft(cube, axis=-1, overwrite_x=True, workers=1)
            scipy.fft.fft(dcube, axis=-1, overwrite_x=True, workers=1)
            floor.append(time.perf_counter() - t0)

    chain_ms = _median_ms(total)
    floor_ms = _median_ms(floor)
    return {
        "name": name,
        "sensor": f"{sensor.n_tx} TX x {sensor.n_rx} RX {sensor.mimo_scheme.upper()}, {sensor.n_loops} loops, "
                  f"{sensor.samples_per_chirp} samples, int16 I/Q",
        "frames_measured": frames,
        "frames_per_s": round(1e3 / chain_ms, 1),
        "chain_ms": chain_ms,
        "fft_floor_ms": floor_ms,
        "chain_over_fft_floor": round(chain_ms / floor_ms, 3),
        "stages_ms": {s: _median_ms(v) for s, v in stage.items()},
        "points_per_frame": int(statistics.median(n_points)),
        "first_frame_s": round(first_frame_s, 3),
        "first_frame_in_process_s": round(first_frame_in_process_s, 3),
        "first_frame_points": int(len(points)),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0, 1),
    }


def measure_served(name: str, workers: int, offered_fps: float = 50.0, seconds: float = 10.0,
                   warm_s: float = 3.0) -> dict:
    """Frames per second through `cubecast serve --workers N` (a subprocess, as a user runs it): a
    publisher here offers pre-simulated frames (headers pre-built, so the source's own cost is left
    out) faster than the chain can take them; serve drops the oldest when behind. The figure is the
    point clouds published per second over a steady window after warm-up."""
    import tempfile
    import threading
    import zlib

    import msgpack
    import zmq

    from .demo import free_port
    from .scene import parse_scene
    from .sensor import parse_sensor
    from .simulate import Simulator
    from .wire import WIRE_VERSION, decode

    text = sensor_toml(name)
    sensor = parse_sensor(text, f"bench sensor {name}")
    sim = Simulator(sensor, parse_scene(SCENE), seed=1)
    raws = [sim.raw_frame(i) for i in range(4)]
    crcs = [zlib.crc32(r) for r in raws]
    with tempfile.TemporaryDirectory() as tmp:
        sensor_path = os.path.join(tmp, f"{name}.toml")
        with open(sensor_path, "w", encoding="utf-8") as f:
            f.write(text)
        p_src, p_pub = free_port(), free_port()
        ctx = zmq.Context()
        pub = ctx.socket(zmq.XPUB)
        pub.setsockopt(zmq.SNDHWM, 4)
        pub.bind(f"tcp://127.0.0.1:{p_src}")
        cmd = [sys.executable, "-m", "cubecast.daemon.cli", "serve", "--sensor", sensor_path, "--sub",
               f"tcp://127.0.0.1:{p_src}", "--pub", f"tcp://127.0.0.1:{p_pub}", "--quiet"]
        if workers:
            cmd += ["--workers", str(workers)]
        log_file = open(os.path.join(tmp, "serve.log"), "w+", encoding="utf-8")
        proc = subprocess.Popen(cmd, stderr=log_file)   # serve's and its workers' log lines, kept out of the table
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        sub.connect(f"tcp://127.0.0.1:{p_pub}")
        stop = threading.Event()
        try:
            if not pub.poll(120_000):  # serve subscribes after warm-up and its workers' ready
                raise RuntimeError("serve did not subscribe within 120 s")
            pub.recv()

            def source():
                seq, t_next = 0, time.monotonic()
                while not stop.is_set():
                    j = seq % len(raws)
                    h = msgpack.packb({"wire": WIRE_VERSION, "kind": "adc", "sensor_id": sensor.sensor_id, "seq": seq,
                                       "run": "bench", "timestamp_s": seq / offered_fps, "dtype": "<i2",
                                       "shape": list(raws[j].shape), "digest": sensor.digest, "crc32": crcs[j]})
                    pub.send_multipart([f"{sensor.sensor_id}/adc".encode(), h,
                                        memoryview(raws[j].reshape(-1).view(np.uint8))], copy=False)
                    seq += 1
                    t_next += 1.0 / offered_fps
                    time.sleep(max(0.0, t_next - time.monotonic()))

            th = threading.Thread(target=source, daemon=True)
            th.start()
            stamps, latencies = [], []
            t_start = time.monotonic() + warm_s
            t_end = t_start + seconds
            while time.monotonic() < t_end:
                if sub.poll(100):
                    m = decode(sub.recv_multipart())
                    if m.kind == "points" and time.monotonic() >= t_start:
                        stamps.append(time.monotonic())
                        latencies.append(m.header["latency_s"])
        finally:
            stop.set()
            proc.terminate()
            proc.wait(10)
            sub.close(0)
            pub.close(0)
            ctx.term()
            log_file.seek(0)
            lines = [ln.rstrip() for ln in log_file if ln.strip()]
            log_file.close()
    return {"workers": workers, "offered_fps": offered_fps, "frames_per_s": round(len(stamps) / seconds, 1),
            "latency_p50_ms": round(float(np.median(latencies)) * 1e3, 1) if latencies else None,
            "log_lines": len(lines), "first_log_line": lines[0][:160] if lines else None}


# The speed targets (README, Speed): name, the result row's sensor, what is compared, the limit, the
# sense (True: at most, False: at least)
TARGETS = (
    ("reference chain within 1.5 x the FFT floor", "reference", "chain_over_fft_floor", 1.5, True),
    ("reference at least 60 frames/s on one core", "reference", "frames_per_s", 60.0, False),
    ("large at least 20 frames/s through serve --workers 2", "large", "served_frames_per_s", 20.0, False),
    ("first frame within 2 s of process start", None, "first_frame_s", 2.0, True),
)


def check_targets(result: dict) -> list[dict]:
    """Each target of TARGETS that this result measured: its value and whether it is met."""
    out = []
    for text, sensor, key, limit, at_most in TARGETS:
        for row in result["sensors"]:
            if sensor is not None and row["name"] != sensor:
                continue
            value = row.get("served", {}).get("frames_per_s") if key == "served_frames_per_s" else row.get(key)
            if value is None:
                continue
            met = value <= limit if at_most else value >= limit
            out.append({"target": text, "sensor": row["name"], "value": value, "limit": limit, "met": bool(met)})
    return out


def _load() -> float | None:
    try:
        return round(os.getloadavg()[0], 2)
    except OSError:
        return None


def run(names: list[str], frames: int, served_workers: int = 0) -> dict:
    """Each sensor in its own fresh interpreter, one after the other; with served_workers, the
    `large` sensor also through `serve --workers N`. The host's 1-minute load average is recorded
    before and after (a busy host slows every figure; the ratio to the FFT floor least)."""
    rows = []
    load_before = _load()
    for name in names:
        log.info("bench: sensor %s (%d frames after warm-up)", name, frames)
        env = dict(os.environ, NUMBA_NUM_THREADS="1")
        # fill numba's cache first (a fresh checkout compiles once), so first_frame_s is a start-up
        # with the cache in place, as `serve` sees it
        subprocess.run([sys.executable, "-m", "cubecast.daemon.bench", name, "0"], capture_output=True, env=env, check=False)
        env[SPAWN_ENV] = repr(time.time())
        out = subprocess.run([sys.executable, "-m", "cubecast.daemon.bench", name, str(frames)], capture_output=True,
                             text=True, env=env, check=False)
        if out.returncode != 0:
            raise CubecastError(f"bench for sensor '{name}' failed: {out.stderr.strip().splitlines()[-1:]}")
        row = json.loads(out.stdout)
        if served_workers and name == "large":
            log.info("bench: sensor %s through serve --workers %d", name, served_workers)
            row["served"] = measure_served(name, served_workers)
        rows.append(row)
    result = {"sensors": rows, "load_average_before": load_before, "load_average_after": _load(),
              "cpus": os.cpu_count()}
    result["targets"] = check_targets(result)
    return result


def print_table(result: dict) -> None:
    for row in result["sensors"]:
        print(f"{row['name']}: {row['sensor']}")
        print(f"  chain {row['chain_ms']:.2f} ms/frame = {row['frames_per_s']:.0f} frames/s on one core; "
              f"FFT floor {row['fft_floor_ms']:.2f} ms; chain / floor = {row['chain_over_fft_floor']:.2f}")
        print("  stages (ms): " + ", ".join(f"{k} {v:.3f}" for k, v in row["stages_ms"].items()))
        print(f"  first frame {row['first_frame_s']:.2f} s after process start "
              f"({row['first_frame_in_process_s']:.2f} s from building the chain); peak RSS {row['peak_rss_mb']:.0f} MB; "
              f"{row['points_per_frame']} points/frame")
        if "served" in row:
            sv = row["served"]
            print(f"  through serve --workers {sv['workers']}: {sv['frames_per_s']:.1f} frames/s "
                  f"(offered {sv['offered_fps']:.0f}; latency p50 {sv['latency_p50_ms']} ms)"
                  + (f"; serve logged {sv['log_lines']} lines, first: {sv['first_log_line']}" if sv.get("log_lines") else ""))
    if result.get("load_average_before") is not None:
        print(f"host: {result['cpus']} CPUs, 1-minute load average {result['load_average_before']} before, "
              f"{result['load_average_after']} after (a busy host slows every figure)")
    for t in result.get("targets", []):
        print(f"target {'met   ' if t['met'] else 'MISSED'} {t['target']} ({t['sensor']}): {t['value']:g}")


ACCURACY_TRIALS = 400  # per SNR and sensor: the whole `bench --accuracy` in about a minute here


def accuracy_sensors() -> list[tuple[str, object]]:
    """The sensors of `bench --accuracy`: the reference benchmark sensor and, when the bundled
    samples are there, the yard sensor."""
    from .demo import SAMPLES_DIR
    from .sensor import load_sensor, parse_sensor
    out = [("reference", parse_sensor(sensor_toml("reference"), "bench sensor reference"))]
    yard = SAMPLES_DIR / "yard_sensor.toml"
    if yard.is_file():
        out.append(("yard", load_sensor(yard)))
    else:
        log.info("accuracy: no bundled yard sensor at %s; the reference sensor only", yard)
    return out


def run_accuracy(trials: int = ACCURACY_TRIALS, seed: int = 0, progress: bool = False) -> dict:
    """Monte Carlo accuracy (accuracy.sweep) of the chain with default settings at the integrated
    SNRs of accuracy.SNR_DB, per sensor of accuracy_sensors()."""
    from . import accuracy
    from .settings import ProcessingSettings

    if trials < 2:
        raise CubecastError(f"--trials {trials}: an RMSE needs at least 2 trials")
    settings = ProcessingSettings().validate()
    t0 = time.perf_counter()
    rows = []
    for name, sensor in accuracy_sensors():
        t1 = time.perf_counter()
        draws = accuracy.Draws.for_sensor(sensor, settings)
        result = accuracy.sweep(sensor, settings, accuracy.SNR_DB, trials, seed, draws, progress, f"accuracy {name}")
        rows.append({"name": name, "sensor": _describe_sensor(sensor),
                     "draws": {k: list(v) for k, v in vars(draws).items()}, "rows": result,
                     "seconds": round(time.perf_counter() - t1, 1)})
        log.info("accuracy: %s, %d trials x %d SNRs in %.1f s", name, trials, len(accuracy.SNR_DB),
                 time.perf_counter() - t1)
    return {"snr_definition": accuracy.SNR_DEFINITION, "trials": trials, "seed": seed,
            "gate": f"a point within {accuracy.GATE_CELLS:g} range and velocity cells and "
                    f"{accuracy.GATE_BEAMWIDTHS:g} azimuth beamwidth of the truth is a detection",
            "sensors": rows, "seconds": round(time.perf_counter() - t0, 1)}


def _describe_sensor(sensor) -> str:
    return (f"{sensor.n_tx} TX x {sensor.n_rx} RX {sensor.mimo_scheme.upper()}, {sensor.n_loops} loops, "
            f"{sensor.samples_per_chirp} samples")


def _fmt(x: float | None, width: int = 6) -> str:
    return f"{x:{width}.2f}" if x is not None else f"{'-':>{width}}"


def print_accuracy_table(result: dict) -> None:
    """One row per integrated SNR: RMSE / CRB and RMSE / RMS(reported sigma) for range, velocity,
    azimuth and elevation, and the detection rate."""
    from .accuracy import COORDINATES
    short = {"range": "range", "velocity": "vel", "azimuth": "az", "elevation": "el"}
    names = "".join(f"{short[c]:>6}" for c in COORDINATES)
    print(f"accuracy over {result['trials']} trials per SNR (seed {result['seed']}): RMSE of the matched point over "
          "the Cramer-Rao bound (CRB) and over the RMS of its reported sigma")
    print(f"  {result['snr_definition']}; {result['gate']}")
    for s in result["sensors"]:
        d = s["draws"]
        print(f"{s['name']}: {s['sensor']}; targets uniform in range {d['range_m'][0]:.1f}..{d['range_m'][1]:.1f} m, "
              f"velocity {d['velocity_mps'][0]:+.2f}..{d['velocity_mps'][1]:+.2f} m/s, azimuth "
              f"{d['azimuth_deg'][0]:g}..{d['azimuth_deg'][1]:g} deg, elevation {d['elevation_deg'][0]:g}.."
              f"{d['elevation_deg'][1]:g} deg ({s['seconds']:.0f} s)")
        print(f"  {'integrated':>10} {'per sample':>10}   {'RMSE / CRB':^24}   {'RMSE / sigma':^24}")
        print(f"  {'SNR dB':>10} {'SNR dB':>10}   {names}   {names}   {'detected':>8} {'points/frame':>12}")
        for r in s["rows"]:
            crb = "".join(_fmt(r[c] and r[c]["rmse_over_crb"]) for c in COORDINATES)
            sig = "".join(_fmt(r[c] and r[c]["rmse_over_sigma"]) for c in COORDINATES)
            print(f"  {r['snr_db']:10.0f} {r['snr_per_sample_db']:10.1f}   {crb}   {sig}   {r['detection_rate']:8.3f} "
                  f"{r['points_per_frame']:12.2f}")
    print(f"run time {result['seconds']:.0f} s")


def warm(name: str) -> None:
    """Compile (or load) every numba function the chain uses for this sensor."""
    from .chain.pipeline import Pipeline
    from .sensor import parse_sensor
    sensor = parse_sensor(sensor_toml(name), f"bench sensor {name}")
    pipe = Pipeline(sensor)
    pipe.warm_up()  # every compiled path, the per-detection ones included
    pipe.process_raw(np.zeros(sensor.adc.raw_shape(*pipe.frame_shape), sensor.adc.raw_dtype()))


if __name__ == "__main__":  # one sensor, in a fresh process: python -m cubecast.daemon.bench NAME FRAMES (0: warm only)
    if int(sys.argv[2]) == 0:
        warm(sys.argv[1])
    else:
        print(json.dumps(measure(sys.argv[1], int(sys.argv[2]))))
