"""The benchmark's report: the fields README and tracker tooling read (no speed targets here: those
live in the benchmark itself, never as timed assertions)."""

from __future__ import annotations

import json
import subprocess
import sys

from cubecast.daemon.bench import SENSORS, sensor_toml
from cubecast.daemon.sensor import parse_sensor


def test_bench_sensors_are_the_ones_specified():
    # reference: 3 TX x 4 RX TDM, 128 loops, 256 samples, int16 I/Q; large: 12 TX x 16 RX, 64 loops
    ref = parse_sensor(sensor_toml("reference"))
    big = parse_sensor(sensor_toml("large"))
    assert (ref.n_tx, ref.n_rx, ref.n_loops, ref.samples_per_chirp, ref.mimo_scheme) == (3, 4, 128, 256, "tdm")
    assert ref.adc.sample_type == "int16" and ref.adc.is_complex
    assert (big.n_tx, big.n_rx, big.n_loops, big.samples_per_chirp) == (12, 16, 64, 256)
    assert set(SENSORS) == {"reference", "large"}


def test_bench_json_report():
    out = subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", "bench", "--json", "--sensor", "reference",
                          "--frames", "50", "--workers", "0"], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    result = json.loads(out.stdout)
    (row,) = result["sensors"]
    for key in ("name", "frames_per_s", "chain_ms", "fft_floor_ms", "chain_over_fft_floor", "stages_ms",
                "peak_rss_mb", "first_frame_s"):
        assert key in row, key
    assert row["name"] == "reference" and row["frames_measured"] == 50
    assert row["chain_ms"] > 0 and row["fft_floor_ms"] > 0
    assert abs(row["chain_over_fft_floor"] - row["chain_ms"] / row["fft_floor_ms"]) < 0.01
    assert set(row["stages_ms"]) == {"range_fft", "doppler_fft", "cfar", "mimo", "angle", "points"}
    assert row["points_per_frame"] >= 3  # the bench scene's targets are found
    # start-up is counted from the process start, so it includes the part from building the chain
    assert row["first_frame_s"] >= row["first_frame_in_process_s"] > 0


def test_bench_rejects_too_few_frames():
    out = subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", "bench", "--frames", "10"], capture_output=True,
                         text=True, timeout=60)
    assert out.returncode == 2 and "at least 50 frames" in out.stderr
