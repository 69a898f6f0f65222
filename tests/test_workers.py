"""serve with worker processes, over real sockets on 127.0.0.1: the re-sequenced output equals the
single-process chain byte for byte, a killed or silent worker costs exactly the frames it held, remote
workers join with `cubecast worker`, a worker with another sensor is refused, and every message of the
worker protocol is validated. Every wait is bounded.

The reference throughout is the chain run in one process (Pipeline.process on the canonical frame, as
`cubecast process` does it): distributing the work must not change a single byte of the records."""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import pytest
import zmq

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.chain.points import RECORD_DTYPE, to_records
from cubecast.daemon.cli import main as cli_main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import capture_sensor, to_canonical
from cubecast.daemon.chain.rdmap import pool_rdmap
from cubecast.daemon.service import Service
from cubecast.daemon.settings import ProcessingSettings
from cubecast.daemon.sources import AdcPublisher, ReplaySource
from cubecast.daemon.wire import decode, encode_adc
from cubecast.daemon.worker import Worker
from cubecast.daemon.workproto import (ProtocolError, WorkerConfig, decode_result, decode_task, decode_welcome,
                                       encode_result, encode_task, encode_welcome)
from tests.helpers import SAMPLES, YARD_SENSOR
from tests.test_service import Collector, connected, run_in_thread, wait_until

YARD = SAMPLES / "yard.cap"
REPO = Path(__file__).resolve().parent.parent


# ---- fixtures and helpers ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def sensor():
    with CaptureReader(YARD) as r:
        return capture_sensor(r)


@pytest.fixture(scope="module")
def frames():
    with CaptureReader(YARD) as r:
        return [r.read(i).payload for i in range(len(r))]


@pytest.fixture(scope="module")
def ref_points(sensor, frames):
    """The single-process chain on every frame of the capture (canonical frames, Pipeline.process)."""
    p = Pipeline(sensor)
    return [p.process(to_canonical(sensor, f)).copy() for f in frames]


def reference_bytes(ref_points, seq: int, timestamp_s: float) -> bytes:
    return to_records(ref_points[seq % len(ref_points)], seq, timestamp_s).tobytes()


def full_invariant(s: dict) -> bool:
    # received == processed + dropped + rejected + queue + in_progress + lost to workers + in flight
    return s["frames_received"] == (s["frames_processed"] + s["frames_dropped"] + s["frames_rejected"]
                                    + s["queue_depth"] + s["in_progress"] + s["frames_lost_worker"]
                                    + s["in_flight"])


@contextlib.contextmanager
def serving(sensor, sub, **kw):
    """A Service with workers in a thread; on exit it must stop within 3 s and leave no local worker."""
    svc = Service(sensor, sub, "tcp://127.0.0.1:*", **kw)
    t, stop, errors = run_in_thread(svc)
    assert wait_until(lambda: svc.ready.is_set() or errors, 90) and not errors, errors
    pids = [p for p in svc.processor.pool.local_pids() if p is not None]
    try:
        yield svc
    finally:
        pids += [p for p in svc.processor.pool.local_pids() if p is not None]
        stop.set()
        t.join(5)
        assert not t.is_alive(), "serve did not stop within 5 s"
        assert not errors, errors
        # serve stops its local workers (killing them after 0.7 s) and reaps them
        assert not [pid for pid in pids if _alive(pid)], "local workers still running"


def _alive(pid: int) -> bool:
    try:
        return "zombie" not in Path(f"/proc/{pid}/status").read_text().lower()
    except OSError:
        return False


def settled(svc: Service, total: int, timeout_s: float = 20.0) -> dict:
    """Wait until all `total` frames sent are accounted for and nothing is queued or in flight."""
    def done():
        s = svc.stats()
        return (s["frames_received"] == total and s["queue_depth"] == 0 and s["in_flight"] == 0
                and s["in_progress"] == 0)
    assert wait_until(done, timeout_s), svc.stats()
    return svc.stats()


def row(svc: Service, pid: int) -> dict | None:
    return next((r for r in svc.stats()["workers"] if r["pid"] == pid), None)


def adc_message(sensor, frame, seq: int, **over):
    return decode(encode_adc(sensor.sensor_id, seq, "run-1", seq * 0.1, frame, over.pop("digest", sensor.digest)))


# ---- the protocol, pure -----------------------------------------------------------------------------

def test_task_roundtrip_and_every_check(sensor, frames):
    msg = adc_message(sensor, frames[3], 3)
    parts = encode_task("S1", 7, msg.header, msg.payload, 1.7e9, True)
    task = decode_task([bytes(memoryview(p)) for p in parts], sensor, "S1")
    assert (task.task_id, task.seq, task.run, task.want_rdmap, task.raw) == (7, 3, "run-1", True, True)
    assert task.timestamp_s == pytest.approx(0.3) and task.data.tobytes() == frames[3].tobytes()

    def broken(header_over=None, payload=None, session="S1"):
        h = msgpack.unpackb(parts[1])
        h.update(header_over or {})
        p = [parts[0], msgpack.packb(h), payload if payload is not None else bytes(parts[2])]
        with pytest.raises(ProtocolError) as info:
            decode_task(p, sensor, session)
        return str(info.value)

    assert "'digest'" in broken({"digest": "0123456789abcdef"})
    assert "'session'" in broken(session="S2")
    assert "'dtype'" in broken({"dtype": "<f4"})
    assert "'shape'" in broken({"shape": [48, 4, 128, 2]})
    assert "'proto'" in broken({"proto": 2})
    assert "'seq'" in broken({"seq": -1}) and "'seq'" in broken({"seq": True})  # booleans are not integers
    assert "'timestamp_s'" in broken({"timestamp_s": float("nan")})
    # CRC-32 of zlib (ISO 3309 / ITU-T V.42): one flipped bit anywhere is detected
    bad = bytearray(parts[2])
    bad[12345] ^= 0x10
    assert "'crc32'" in broken(payload=bytes(bad))
    # a local worker (serve's loopback) skips the re-check, by request only
    assert decode_task([parts[0], bytes(parts[1]), bytes(bad)], sensor, "S1", check_crc=False).seq == 3
    assert "bytes" in broken(payload=bytes(parts[2])[:-4])
    # msgpack ext types are refused before any field is read (README "Wire format": never unpickle or eval)
    with pytest.raises(ProtocolError, match="ext"):
        decode_task([b"task", msgpack.packb({"proto": 1, "x": msgpack.ExtType(1, b"x")}), b""], sensor, "S1")
    with pytest.raises(ProtocolError, match="parts"):
        decode_task(parts[:2], sensor, "S1")


def test_result_roundtrip_and_checks(ref_points):
    recs = to_records(ref_points[3], 3, 0.3)
    assert len(recs) > 0
    values = np.arange(128 * 64, dtype=np.float32).reshape(128, 64)
    parts = encode_result("wabc", "S1", 7, 3, recs, None, {"cfar": 0.5}, 0.01, (values, 0.1, 0.2, -3.0, 0.05))
    worker, session, res = decode_result([bytes(memoryview(p)) for p in parts])
    assert (worker, session, res.task_id, res.seq, res.error) == ("wabc", "S1", 7, 3, None)
    assert res.records.tobytes() == recs.tobytes()
    assert np.array_equal(res.rdmap[0], values) and res.rdmap[1:] == (0.1, 0.2, -3.0, 0.05)

    def broken(header_over=None, records=None, rdmap_payload=None):
        h = msgpack.unpackb(parts[1])
        h.update(header_over or {})
        p = [b"result", msgpack.packb(h), records if records is not None else bytes(parts[2]),
             rdmap_payload if rdmap_payload is not None else bytes(parts[3])]
        with pytest.raises(ProtocolError) as info:
            decode_result(p)
        return str(info.value)

    assert "count" in broken({"count": len(recs) + 1})
    assert "frame numbers" in broken({"seq": 4})  # records of another frame
    assert "rdmap" in broken(rdmap_payload=bytes(parts[3])[:-4])
    assert "cells" in broken({"rdmap": {"shape": [256, 64], "range_start_m": 0.0, "range_step_m": 1.0,
                                        "velocity_start_mps": 0.0, "velocity_step_mps": 1.0}})
    assert "'stage_ms'" in broken({"stage_ms": {"cfar": "fast"}})
    # an error result carries no records
    _, _, err = decode_result(encode_result("wabc", "S1", 8, 4, None, "boom", {}, 0.0, None))
    assert err.error == "boom" and err.records.dtype == RECORD_DTYPE and len(err.records) == 0


def test_welcome_carries_the_whole_configuration(sensor):
    settings = ProcessingSettings(cfar_kind="ca", min_range_m=1.25, angle_max_peaks=1)
    cal = (np.exp(1j * np.linspace(0, 1, sensor.n_virtual)) * 0.9).astype(np.complex64)
    parts = [bytes(memoryview(p)) for p in encode_welcome("S9", WorkerConfig(sensor, settings, cal, 0.031))]
    session, cfg = decode_welcome(parts, sensor.digest)
    assert session == "S9" and cfg.sensor.digest == sensor.digest and cfg.settings == settings
    assert cfg.calibration.tobytes() == cal.tobytes() and cfg.range_bias_m == 0.031
    # a worker started with another sensor description stops with both digests named
    with pytest.raises(CubecastError) as info:
        decode_welcome(parts, "0123456789abcdef")
    assert sensor.digest in str(info.value) and "0123456789abcdef" in str(info.value)
    h = msgpack.unpackb(parts[1])
    for over, word in (({"digest": "0123456789abcdef"}, "'digest'"), ({"settings": {"cfar_kind": 3}}, "cfar_kind"),
                       ({"settings": {"no_such": 1}}, "no_such"), ({"settings": {"cfar_pfa": 2.0}}, "cfar_pfa"),
                       ({"calibration": {"dtype": "<c8", "count": 3}}, "virtual channels")):
        bad = dict(h, **over)
        with pytest.raises(ProtocolError, match=word):
            decode_welcome([parts[0], msgpack.packb(bad), parts[2]], None)


def test_worker_validates_tasks_against_a_scripted_serve(sensor, frames, ref_points):
    """A Worker in a thread against a ROUTER and a PULL driven by the test, as serve would."""
    ctx = zmq.Context()
    router, pull = ctx.socket(zmq.ROUTER), ctx.socket(zmq.PULL)
    for s in (router, pull):
        s.setsockopt(zmq.LINGER, 0)
        s.bind("tcp://127.0.0.1:*")
    w = Worker(router.getsockopt_string(zmq.LAST_ENDPOINT), pull.getsockopt_string(zmq.LAST_ENDPOINT),
               name="scripted")
    stop = threading.Event()
    t = threading.Thread(target=w.run, args=(stop,), daemon=True)
    t.start()

    def recv(sock, timeout_s=30.0):
        assert sock.poll(int(timeout_s * 1000)), "no message from the worker"
        return sock.recv_multipart()

    try:
        key, kind, h = recv(router)
        hello = msgpack.unpackb(h)
        assert kind == b"hello" and hello["name"] == "scripted" and hello["capacity"] == 2
        assert hello["expect_digest"] is None and hello["worker"] == key.decode()
        router.send_multipart([key] + encode_welcome("S1", WorkerConfig(sensor, ProcessingSettings(), None, 0.0)))
        key2, kind, h = recv(router, 60)
        assert (key2, kind, msgpack.unpackb(h)["session"]) == (key, b"ready", "S1")

        def task(seq, session="S1", rdmap=False, **over):
            msg = adc_message(sensor, frames[seq % 20], seq)
            hdr = dict(msg.header, **over)
            router.send_multipart([key] + encode_task(session, seq, hdr, msg.payload, time.time(), rdmap))

        def result():
            parts = recv(pull)
            return decode_result(parts)[2]

        task(1, digest="0123456789abcdef")
        r = result()
        assert r.task_id == 1 and "'digest'" in r.error and len(r.records) == 0
        task(2, crc32=(adc_message(sensor, frames[2], 2).header["crc32"] ^ 1))
        r = result()
        assert r.task_id == 2 and "'crc32'" in r.error
        task(3, session="OTHER")  # a task of a serve this worker was not welcomed by: nobody waits for it
        task(4, rdmap=True)
        r = result()
        assert (r.task_id, r.error) == (4, None)
        assert r.records.tobytes() == reference_bytes(ref_points, 4, 0.4)
        # the pooled map equals the single-process one for this frame
        p = Pipeline(sensor)
        p.process(to_canonical(sensor, frames[4]))
        ref = pool_rdmap(p.detection_map, p.range_fft.bin_m, p.doppler_fft.bin_hz * sensor.wavelength_m / 2)
        assert np.array_equal(r.rdmap[0], ref[0]) and r.rdmap[1:] == tuple(float(v) for v in ref[1:])
        assert w.tasks_ignored == 1 and w.tasks_failed == 2 and w.tasks_done == 1
        router.send_multipart([key, b"who", msgpack.packb({"proto": 1, "session": "S2"})])
        while True:  # beats may come first
            _, kind, h = recv(router, 5)
            if kind == b"hello":
                break
    finally:
        stop.set()
        t.join(5)
        assert not t.is_alive()
        router.close(0)
        pull.close(0)
        ctx.term()


# ---- serve with workers, end to end ------------------------------------------------------------------

def test_two_workers_equal_single_process_byte_for_byte(sensor, ref_points, frames):
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=None, wait_s=30)
    ep = src.bind()
    with serving(sensor, ep, workers=2, queue_depth=64, rdmap_max_hz=1000.0) as svc:
        col = Collector(svc.pub_endpoint)
        try:
            connected(col)
            assert src.run() == 20
            s = settled(svc, 20)
            assert s["frames_processed"] == 20 and s["frames_lost_worker"] == 0 and s["frames_dropped"] == 0
            assert col.wait_for(lambda c: len(c.of("points")) >= 20, 10)
            pts = col.of("points")
            assert [m.seq for m in pts] == list(range(20))  # in frame order
            for m in pts:
                assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s), m.seq
            assert sum(len(p) for p in ref_points) > 0
            # both workers took part
            rows = s["workers"]
            assert len(rows) == 2 and all(r["tasks_done"] > 0 and r["alive"] and r["local"] for r in rows)
            assert sum(r["tasks_done"] for r in rows) == 20
            # display maps, computed by the workers, equal the single-process map of their frame
            maps = col.of("rdmap")
            assert maps
            p = Pipeline(sensor)
            for m in maps[:3]:
                p.process(to_canonical(sensor, frames[m.seq]))
                ref = pool_rdmap(p.detection_map, p.range_fft.bin_m, p.doppler_fft.bin_hz * sensor.wavelength_m / 2)
                assert np.array_equal(m.data, ref[0])
            assert col.wait_for(lambda c: c.of("health"), 3)
            for h in col.of("health"):
                assert full_invariant(h.header) and h.header["workers_alive"] == 2
        finally:
            col.close()


def test_flood_with_workers_drops_oldest_keeps_order_and_counts_everything(sensor, frames, ref_points):
    pub = AdcPublisher(sensor, "tcp://127.0.0.1:*", sndhwm=8)
    try:
        with serving(sensor, pub.endpoint, workers=2, queue_depth=2, rdmap_max_hz=0.0) as svc:
            col = Collector(svc.pub_endpoint, prefix=b"yard-a/")
            snapshots: list[dict] = []
            watching = threading.Event()

            def watch():  # the counters, read from another thread while frames flow
                while not watching.is_set():
                    snapshots.append(svc.stats())
                    time.sleep(0.002)

            watcher = threading.Thread(target=watch, daemon=True)
            try:
                connected(col)
                assert pub.wait_for_subscribers(1, 10, threading.Event())
                watcher.start()
                seq = _send(pub, frames, 0, 400, 0.0)
                time.sleep(0.3)
                seq = _send(pub, frames, seq, 1)  # a last frame after a pause, so that it surely arrives
                assert wait_until(lambda: svc.stats()["frames_processed"] > 0 and svc.stats()["in_flight"] == 0
                                  and svc.stats()["queue_depth"] == 0, 20)
                time.sleep(0.3)
                watching.set()
                watcher.join(2)
                s = svc.stats()
                assert s["frames_dropped"] > 0 and s["frames_rejected"] == 0 and s["frames_lost_worker"] == 0, s
                assert s["frames_received"] - s["frames_rejected"] + s["sequence_gaps"] == seq, s
                assert full_invariant(s)
                assert len(snapshots) > 10 and all(full_invariant(x) for x in snapshots)
                assert col.wait_for(lambda c: len(c.of("points")) >= s["frames_processed"], 10)
                got = [m.seq for m in col.of("points")]
                assert got == sorted(set(got)) and got[-1] == seq - 1
                for m in col.of("points"):
                    assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s), m.seq
                assert col.wait_for(lambda c: c.of("health"), 3)
                assert all(full_invariant(h.header) for h in col.of("health"))
            finally:
                watching.set()
                col.close()
    finally:
        pub.close()


def _send(pub, frames, seq: int, n: int, pause_s: float = 0.004) -> int:
    for _ in range(n):
        pub.send(frames[seq % 20].copy(), seq * 0.1)
        seq += 1
        time.sleep(pause_s)
    return seq


def _hold_until_full(svc, pub, frames, seq: int, victim: int) -> tuple[int, int]:
    """Send frames until the stopped worker `victim` holds as many as its capacity. serve hands a frame
    to the least loaded worker, so frames go out in bursts that keep the other one busy."""
    deadline = time.monotonic() + 4
    while row(svc, victim)["outstanding"] < row(svc, victim)["capacity"]:
        assert time.monotonic() < deadline, svc.stats()
        seq = _send(pub, frames, seq, 3, 0.0)
        time.sleep(0.05)
    time.sleep(0.2)
    r = row(svc, victim)
    assert r["outstanding"] == r["capacity"], r  # never more than its capacity: credit-based dispatch
    return seq, r["capacity"]


def test_killed_worker_costs_the_frames_it_held_and_the_stream_goes_on(sensor, frames, ref_points):
    pub = AdcPublisher(sensor, "tcp://127.0.0.1:*")
    try:
        # a long task timeout: the death is noticed from the process and its connection, not from silence
        with serving(sensor, pub.endpoint, workers=2, queue_depth=1024, rdmap_max_hz=0.0,
                     task_timeout_s=30.0) as svc:
            col = Collector(svc.pub_endpoint, prefix=b"yard-a/")
            try:
                connected(col)
                assert pub.wait_for_subscribers(1, 10, threading.Event())
                seq = _send(pub, frames, 0, 30)
                assert wait_until(lambda: svc.stats()["frames_processed"] == 30, 20), svc.stats()
                victim = svc.stats()["workers"][0]["pid"]
                os.kill(victim, signal.SIGSTOP)
                seq, held = _hold_until_full(svc, pub, frames, seq, victim)
                t_kill = time.monotonic()
                os.kill(victim, signal.SIGKILL)
                assert wait_until(lambda: svc.stats()["frames_lost_worker"] == held, 5), svc.stats()
                assert time.monotonic() - t_kill < 5  # long before the 30 s task timeout
                seq = _send(pub, frames, seq, 30)
                s = settled(svc, seq)
                assert s["frames_lost_worker"] == held and s["frames_dropped"] == 0
                assert s["frames_processed"] == seq - held and full_invariant(s)
                assert col.wait_for(lambda c: len(c.of("points")) >= seq - held, 10)
                got = [m.seq for m in col.of("points")]
                assert got == sorted(set(got)), "out of order or repeated"
                assert len(set(range(seq)) - set(got)) == held and got[-1] == seq - 1  # the stream went on
                for m in col.of("points"):
                    assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s), m.seq
                r = row(svc, victim)
                assert r is not None and not r["alive"] and r["tasks_lost"] == held
                # serve restarts its local worker (after ~1 s) and it joins again
                assert wait_until(lambda: svc.stats()["workers_alive"] == 2, 20), svc.stats()
                assert victim not in [p for p in svc.processor.pool.local_pids()]
                assert col.wait_for(lambda c: c.of("health") and full_invariant(c.of("health")[-1].header), 3)
                assert all(full_invariant(h.header) for h in col.of("health"))
            finally:
                col.close()
    finally:
        pub.close()


def test_silent_worker_times_out_and_its_late_results_are_discarded(sensor, frames, ref_points):
    pub = AdcPublisher(sensor, "tcp://127.0.0.1:*")
    try:
        with serving(sensor, pub.endpoint, workers=2, queue_depth=1024, rdmap_max_hz=0.0, task_timeout_s=1.0) as svc:
            col = Collector(svc.pub_endpoint, prefix=b"yard-a/points")
            victim = None
            try:
                assert pub.wait_for_subscribers(1, 10, threading.Event())
                time.sleep(0.3)  # the collector's subscription reaches serve
                seq = _send(pub, frames, 0, 10)
                assert wait_until(lambda: svc.stats()["frames_processed"] == 10, 20), svc.stats()
                victim = svc.stats()["workers"][0]["pid"]
                os.kill(victim, signal.SIGSTOP)
                seq, held = _hold_until_full(svc, pub, frames, seq, victim)
                # the other worker carries the stream while the stopped one's frames time out
                seq = _send(pub, frames, seq, 30, 0.04)
                assert wait_until(lambda: svc.stats()["frames_lost_worker"] == held, 5), svc.stats()
                assert not row(svc, victim)["alive"]
                os.kill(victim, signal.SIGCONT)
                victim_cont = victim
                victim = None
                # it answers the two frames late (discarded), then introduces itself again and rejoins
                assert wait_until(lambda: svc.stats()["worker_results_discarded"] == held, 10), svc.stats()
                assert wait_until(lambda: (row(svc, victim_cont) or {}).get("alive"), 10), svc.stats()
                seq = _send(pub, frames, seq, 20)
                s = settled(svc, seq)
                assert s["frames_lost_worker"] == held and s["frames_processed"] == seq - held and full_invariant(s)
                assert col.wait_for(lambda c: len(c.of("points")) >= seq - held, 10)
                got = [m.seq for m in col.of("points")]
                assert got == sorted(set(got)) and len(set(range(seq)) - set(got)) == held
                for m in col.of("points"):
                    assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s), m.seq
            finally:
                if victim is not None:
                    os.kill(victim, signal.SIGCONT)
                col.close()
    finally:
        pub.close()


def _worker_cmd(svc, *extra) -> list[str]:
    pool = svc.processor.pool
    return [sys.executable, "-m", "cubecast.daemon.cli", "worker", "--connect", pool.tasks_endpoint,
            "--results", pool.results_endpoint, *extra]


def test_remote_style_worker_joins_and_processes(sensor, ref_points):
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=None, wait_s=30)
    ep = src.bind()
    with serving(sensor, ep, tasks_endpoint="tcp://127.0.0.1:*", results_endpoint="tcp://127.0.0.1:*",
                 queue_depth=64) as svc:
        assert svc.stats()["workers"] == [] and svc.processor.pool.slots == []  # no local workers
        proc = subprocess.Popen(_worker_cmd(svc, "--sensor", str(YARD_SENSOR), "--name", "remote-a"), cwd=REPO,
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        col = Collector(svc.pub_endpoint, prefix=b"yard-a/points")
        try:
            assert wait_until(lambda: svc.stats()["workers_alive"] == 1 or proc.poll() is not None, 60), \
                proc.stderr.read() if proc.poll() is not None else svc.stats()
            time.sleep(0.3)  # the collector's subscription reaches serve
            assert src.run() == 20
            s = settled(svc, 20)
            assert s["frames_processed"] == 20 and s["frames_lost_worker"] == 0
            assert col.wait_for(lambda c: len(c.of("points")) >= 20, 10)
            assert [m.seq for m in col.of("points")] == list(range(20))
            for m in col.of("points"):
                assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s)
            (r,) = s["workers"]
            assert (r["name"], r["local"], r["tasks_done"], r["alive"]) == ("remote-a", False, 20, True)
            proc.send_signal(signal.SIGTERM)
            assert proc.wait(10) == 0
            assert "stopped: 20 tasks processed" in proc.stderr.read()
            # a clean exit says goodbye: no longer alive, nothing lost
            assert wait_until(lambda: svc.stats()["workers_alive"] == 0, 5)
            assert svc.stats()["frames_lost_worker"] == 0
        finally:
            col.close()
            if proc.poll() is None:
                proc.kill()
                proc.wait()


def _free_port() -> int:
    import socket
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as k:
        k.bind(("127.0.0.1", 0))
        return k.getsockname()[1]


def test_remote_worker_outlives_a_serve_restart(sensor, frames, ref_points):
    tasks, results = f"tcp://127.0.0.1:{_free_port()}", f"tcp://127.0.0.1:{_free_port()}"
    proc = subprocess.Popen([sys.executable, "-m", "cubecast.daemon.cli", "worker", "--connect", tasks, "--results", results,
                             "--name", "stays", "--quiet"], cwd=REPO, stderr=subprocess.PIPE, text=True)
    try:
        sessions = []
        for _ in range(2):
            pub = AdcPublisher(sensor, "tcp://127.0.0.1:*")
            try:
                with serving(sensor, pub.endpoint, tasks_endpoint=tasks, results_endpoint=results,
                             queue_depth=64) as svc:
                    col = Collector(svc.pub_endpoint, prefix=b"yard-a/points")
                    try:
                        # the second serve is new to the worker: it asks it to introduce itself again
                        assert wait_until(lambda: svc.stats()["workers_alive"] == 1 or proc.poll() is not None, 60), \
                            svc.stats()
                        assert proc.poll() is None, proc.stderr.read()
                        sessions.append(svc.processor.pool.session)
                        assert pub.wait_for_subscribers(1, 10, threading.Event())
                        time.sleep(0.3)  # the collector's subscription reaches serve
                        n = _send(pub, frames, 0, 5)
                        settled(svc, n)
                        assert col.wait_for(lambda c: len(c.of("points")) >= n, 10)
                        assert [m.seq for m in col.of("points")] == list(range(n))
                        for m in col.of("points"):
                            assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s)
                        assert svc.stats()["workers"][0]["name"] == "stays"
                    finally:
                        col.close()
            finally:
                pub.close()
        assert len(set(sessions)) == 2
    finally:
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(10) == 0


def test_worker_with_another_sensor_is_refused(sensor, tmp_path):
    other = tmp_path / "other.toml"
    text = YARD_SENSOR.read_text()
    assert "tx_power_dbm = 12.0" in text
    other.write_text(text.replace("tx_power_dbm = 12.0", "tx_power_dbm = 13.0"))  # same id, another digest
    from cubecast.daemon.sensor import load_sensor
    other_digest = load_sensor(other).digest
    assert other_digest != sensor.digest
    with serving(sensor, "tcp://127.0.0.1:1", tasks_endpoint="tcp://127.0.0.1:*",
                 results_endpoint="tcp://127.0.0.1:*") as svc:
        out = subprocess.run(_worker_cmd(svc, "--sensor", str(other)), cwd=REPO, capture_output=True, text=True,
                             timeout=60)
        assert out.returncode == 2, out.stderr
        assert "refused" in out.stderr and sensor.digest in out.stderr and other_digest in out.stderr
        s = svc.stats()
        assert s["workers_refused"] == 1 and s["workers_alive"] == 0


@pytest.mark.parametrize("how", ["sigterm", "sigkill"])
def test_serve_cli_with_workers_leaves_no_worker_behind(how):
    proc = subprocess.Popen([sys.executable, "-m", "cubecast.daemon.cli", "serve", "--sensor", str(YARD_SENSOR), "--sub",
                             "tcp://127.0.0.1:1", "--pub", "tcp://127.0.0.1:*", "--workers", "2"],
                            cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    lines: list[str] = []
    reader = threading.Thread(target=lambda: [lines.append(ln) for ln in iter(proc.stderr.readline, "")],
                              daemon=True)
    reader.start()
    try:
        assert wait_until(lambda: any("serve: ready" in ln for ln in lines) or proc.poll() is not None, 60), lines
        assert proc.poll() is None, lines
        assert "workers: 2 local" in "".join(lines) and sum("ready, capacity 2" in ln for ln in lines) == 2
        kids = [int(k) for k in Path(f"/proc/{proc.pid}/task/{proc.pid}/children").read_text().split()]
        assert len(kids) == 2
        if how == "sigterm":
            proc.send_signal(signal.SIGTERM)
            assert proc.wait(5) == 0  # the workers are stopped (or killed after 0.7 s) first
        else:
            proc.kill()  # serve dies without a word: Linux tells its workers (parent-death signal)
            proc.wait(5)
        assert wait_until(lambda: not any(_alive(k) for k in kids), 5), [k for k in kids if _alive(k)]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_serve_cli_needs_both_worker_endpoints(capsys):
    code = cli_main(["serve", "--sensor", str(YARD_SENSOR), "--sub", "tcp://127.0.0.1:1", "--pub",
                     "tcp://127.0.0.1:*", "--tasks", "tcp://127.0.0.1:*"])
    assert code == 2 and "--tasks and --results" in capsys.readouterr().err
