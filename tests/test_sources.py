"""Sources and the recorder over real sockets on 127.0.0.1: replay timing, looping, run ids, live
simulation, recording ADC frames and point clouds, and the CLI wiring. Every wait is bounded."""

from __future__ import annotations

import subprocess
import sys
import threading

import numpy as np
import pytest

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.demo import free_port
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import capture_sensor, write_points_csv
from cubecast.daemon.process import process_frames
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.simulate import Simulator
from cubecast.daemon.sources import PointsCsvWriter, Recorder, ReplaySource, parse_speed, publish_simulation
from tests.helpers import YARD_SENSOR
from tests.test_service import REPO, YARD, Collector, running_service


@pytest.fixture(scope="module")
def capture():
    with CaptureReader(YARD) as r:
        frames = [r.read(i) for i in range(len(r))]
        return capture_sensor(r), frames


def test_parse_speed():
    assert parse_speed("max") is None and parse_speed("MAX") is None
    assert parse_speed("1") == 1.0 and parse_speed("2.5") == 2.5
    for bad in ("0", "-1", "fast", "nan", "inf"):
        with pytest.raises(CubecastError) as info:
            parse_speed(bad)
        assert "--speed" in str(info.value)


def test_replay_keeps_recorded_timing_and_content(capture):
    sensor, frames = capture
    speed = 4.0
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=speed, wait_s=10)
    col = Collector(src.bind())
    try:
        assert src.run() == 20
        assert col.wait_for(lambda c: len(c.of("adc")) >= 20, 5)
        timed = col.timed("adc")
        msgs = [m for _, m in timed]
        assert [m.seq for m in msgs] == list(range(20))
        assert len({m.run for m in msgs}) == 1
        for m, f in zip(msgs, frames):
            assert m.timestamp_s == f.timestamp_s and m.header["digest"] == sensor.digest
            assert m.data.dtype == f.payload.dtype and m.data.tobytes() == f.payload.tobytes()
        # recorded spacing 0.1 s at speed 4: arrivals 25 ms apart, 19 intervals in 0.475 s
        t = np.array([t for t, _ in timed])
        span = t[-1] - t[0]
        assert span == pytest.approx(19 * 0.1 / speed, abs=0.1)
        assert np.median(np.diff(t)) == pytest.approx(0.1 / speed, abs=0.01)
    finally:
        col.close()


def test_replay_loop_keeps_counting_and_new_run_per_start(capture):
    sensor, frames = capture
    runs = []
    for _ in range(2):
        src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=None, loop=True, frames=45, wait_s=10)
        col = Collector(src.bind())
        try:
            assert src.run() == 45
            assert col.wait_for(lambda c: len(c.of("adc")) >= 45, 5)
            msgs = col.of("adc")
            assert [m.seq for m in msgs] == list(range(45))
            # the capture spans 1.9 s at 0.1 s per frame: each pass is shifted by 2.0 s
            for m in msgs:
                lap, j = divmod(m.seq, 20)
                assert m.timestamp_s == pytest.approx(frames[j].timestamp_s + 2.0 * lap, abs=1e-9)
                assert m.data.tobytes() == frames[j].payload.tobytes()
            assert np.all(np.diff([m.timestamp_s for m in msgs]) > 0)
            runs.append(msgs[0].run)
        finally:
            col.close()
    assert runs[0] != runs[1]


def test_publish_simulation_live(capture):
    sensor, _ = capture
    scene = parse_scene('[[target]]\nrange_m = 6.0\nazimuth_deg = 10.0\nelevation_deg = 0.0\n'
                        'radial_velocity_mps = 1.0\nsnr_db = 20.0\n', "test scene")
    ep = f"tcp://127.0.0.1:{free_port()}"
    col = Collector(ep)
    try:
        assert publish_simulation(sensor, scene, ep, frames=3, seed=4, wait_s=10) == 0
        assert col.wait_for(lambda c: len(c.of("adc")) >= 3, 5)
        timed = col.timed("adc")
        sim = Simulator(sensor, scene, seed=4)
        for i, (_, m) in enumerate(timed):
            assert m.seq == i and m.timestamp_s == sim.frame_time_s(i)
            assert np.array_equal(m.data, sim.raw_frame(i))
        # published live at the frame period (0.1 s)
        assert timed[2][0] - timed[0][0] == pytest.approx(2 * sensor.frame_period_s, abs=0.08)
    finally:
        col.close()


def test_points_csv_writer_matches_offline_format(tmp_path, capture):
    sensor, _ = capture
    with CaptureReader(YARD) as r:
        records = process_frames(r, Pipeline(sensor))[:5]
    w = PointsCsvWriter(tmp_path / "a.csv")
    for rec in records:
        w.write(rec)
    w.close()
    write_points_csv(tmp_path / "b.csv", records)
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()
    assert w.points == sum(len(r) for r in records) > 0


def test_record_adc_and_points_from_source_and_daemon(tmp_path, capture):
    sensor, frames = capture
    with CaptureReader(YARD) as r:
        records = process_frames(r, Pipeline(sensor))
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=None, wait_subscribers=2, wait_s=30)
    ep = src.bind()
    with running_service(sensor, ep, queue_depth=64) as svc:
        rec = Recorder([ep, svc.pub_endpoint], tmp_path / "rec.cap", tmp_path / "rec.csv", frames=20)
        result = {}
        t = threading.Thread(target=lambda: result.update(rec.run()), daemon=True)
        t.start()
        assert rec.sensor_known.wait(10), "the recorder got no sensor description from serve"
        assert src.run() == 20
        t.join(15)
        assert not t.is_alive() and result["frames_written"] == 20, result
    with CaptureReader(tmp_path / "rec.cap") as r:
        assert capture_sensor(r).digest == sensor.digest and len(r) == 20
        for f, g in zip(r, frames):
            assert (f.sequence, f.timestamp_s) == (g.sequence, g.timestamp_s)
            assert f.payload.tobytes() == g.payload.tobytes()
        assert r.metadata["source"] == "recorded"
    write_points_csv(tmp_path / "offline.csv", records)
    assert (tmp_path / "rec.csv").read_bytes() == (tmp_path / "offline.csv").read_bytes()


def test_record_without_sensor_description_says_how_to_fix(tmp_path):
    rec = Recorder(["tcp://127.0.0.1:1"], tmp_path / "x.cap", duration_s=0.2)
    with pytest.raises(CubecastError) as info:
        rec.run()
    assert "--sensor" in str(info.value) and not (tmp_path / "x.cap").exists()
    with pytest.raises(CubecastError) as info:
        Recorder(["tcp://127.0.0.1:1"])
    assert "--out" in str(info.value)


def _cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", *args], cwd=REPO, capture_output=True, text=True,
                          timeout=60, **kw)


def test_cli_replay_and_record(tmp_path, capture):
    sensor, frames = capture
    bad = _cli("replay", str(YARD), "--speed", "0")
    assert bad.returncode == 2 and "--speed" in bad.stderr and bad.stderr.count("\n") == 1
    # cubecast record (a subprocess) from an in-process replay; replay waits for the recorder
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=10.0, wait_s=30)
    ep = src.bind()
    t = threading.Thread(target=src.run, daemon=True)
    t.start()
    out = tmp_path / "cli.cap"
    done = _cli("record", "--sub", ep, "--sensor", str(YARD_SENSOR), "--out", str(out), "--frames", "5")
    assert done.returncode == 0, done.stderr
    assert "cubecast record: 5 frames" in done.stderr and done.stdout == ""  # a status line, on stderr
    t.join(10)
    with CaptureReader(out) as r:
        assert len(r) == 5
        assert [f.payload.tobytes() for f in r] == [f.payload.tobytes() for f in frames[:5]]
    # cubecast replay (a subprocess) into a collector
    ep = f"tcp://127.0.0.1:{free_port()}"
    col = Collector(ep)
    try:
        done = _cli("replay", str(YARD), "--pub", ep, "--speed", "max", "--frames", "3", "--wait-subscriber", "10")
        assert done.returncode == 0, done.stderr
        assert "publishing" in done.stderr and "sent 3 frames" in done.stderr
        assert col.wait_for(lambda c: len(c.of("adc")) >= 3, 5)
        assert [m.seq for m in col.of("adc")] == [0, 1, 2]
        # -q before the subcommand: warnings only, so no status lines
        done = _cli("-q", "replay", str(YARD), "--pub", ep, "--speed", "max", "--frames", "2",
                    "--wait-subscriber", "10")
        assert done.returncode == 0 and done.stderr == "", done.stderr
        assert col.wait_for(lambda c: len(c.of("adc")) >= 5, 5)
    finally:
        col.close()
