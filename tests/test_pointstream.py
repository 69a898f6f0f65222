"""The client library for trackers (daemon/pointstream.py) over real sockets on 127.0.0.1, every wait bounded.

- A live serve fed by a replay of the bundled capture: the clouds PointStream yields are byte for byte
  the points `cubecast process` writes for the same frames (its npz file, read with numpy's own npz
  reader), with the frames' timestamps, the sensor's summary (against the sensor file's figures) and
  serve's health map with the fields README "Wire format" lists.
- A source that skips sequence numbers, in lockstep with the stream: the missing clouds are counted
  as gaps, exactly as many as were skipped; a new run is a restart, not a gap.
- Messages built by hand (msgpack, the general-purpose library, following README "Wire format") and
  broken on purpose, on a PUB the test binds: each refused and counted under the reason README names,
  the stream going on with the next good message.
- serve restarting on the same endpoint: the stream connects again by itself (counted), the clouds
  lost meanwhile are gaps; a restarted source (new run) is a restart.
- Keys (CURVE) as the other connecting programs: the right pair gets clouds, no keys get a timeout
  that says the handshake failed.
- timeout_s: a TimeoutError naming the endpoint; stop() from another thread ends the iteration.

Protocol facts used (common practice, from ZeroMQ's zmq_socket(7), from memory): a SUB socket's
subscriptions are topic prefixes; an XPUB socket receives a subscriber's subscription as a message
starting with byte 1; a SUB socket dials again by itself after its peer went away.
"""

from __future__ import annotations

import contextlib
import shutil
import subprocess
import sys
import threading
import time

import msgpack
import numpy as np
import pytest
import zmq

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.demo import free_port
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import capture_sensor
from cubecast.daemon.keys import ServerKeys, create_keys
from cubecast.daemon.pointstream import Cloud, PointStream, PointStreamTimeout
from cubecast.daemon.sensor import load_sensor
from cubecast.daemon.service import Service
from cubecast.daemon.sources import AdcPublisher, ReplaySource
from cubecast.daemon.wire import HEALTH_FLOAT_FIELDS, HEALTH_INT_FIELDS, POINT_WIRE_FIELDS, RECORD_DTYPE
from tests.helpers import SAMPLES, YARD_SENSOR
from tests.test_service import run_in_thread, running_service

YARD = SAMPLES / "yard.cap"
WAIT_S = 30.0  # the longest any one receive waits (a cold numba cache compiles for a while)


@contextlib.contextmanager
def replaying(endpoint: str, **kw):
    """A ReplaySource of the bundled capture bound to `endpoint`, run in a thread; stopped on exit."""
    source = ReplaySource(YARD, endpoint, **kw)
    source.bind()
    stop = threading.Event()
    t = threading.Thread(target=source.run, args=(stop,), daemon=True)
    t.start()
    try:
        yield source
    finally:
        stop.set()
        t.join(5)
        assert not t.is_alive()


@contextlib.contextmanager
def serving(sensor, sub: str, pub: str, **kw):
    """A Service on a given publish endpoint (so that a second one can take it over), stopped on exit."""
    svc = Service(sensor, sub, pub, **kw)
    t, stop, errors = run_in_thread(svc)
    assert svc.ready.wait(60) and not errors, errors
    try:
        yield svc
    finally:
        stop.set()
        t.join(5)
        assert not t.is_alive() and not errors, errors


def npz_frames(path) -> dict[int, np.ndarray]:
    """`cubecast process` npz output (one array per field) -> frame number -> RECORD_DTYPE records."""
    with np.load(path) as z:
        n = len(z["frame"])
        allrec = np.empty(n, RECORD_DTYPE)
        for name in RECORD_DTYPE.names:
            allrec[name] = z[name]
    return {int(f): allrec[allrec["frame"] == f] for f in np.unique(allrec["frame"])}


# ---- against a live serve fed by the bundled capture ---------------------------------------------------

def test_clouds_equal_cubecast_process_output_on_the_same_frames(tmp_path):
    out = tmp_path / "points.npz"
    r = subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", "-q", "process", str(YARD), "--out", str(out)],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    expected = npz_frames(out)
    with CaptureReader(YARD) as reader:
        stamps = {f.sequence: f.timestamp_s for f in reader}
    sensor = load_sensor(YARD_SENSOR)
    src_ep = f"tcp://127.0.0.1:{free_port()}"
    source = ReplaySource(YARD, src_ep, speed=1.0, loop=False, wait_s=WAIT_S)
    source.bind()
    stop = threading.Event()
    t = threading.Thread(target=source.run, args=(stop,), daemon=True)
    try:
        with running_service(sensor, src_ep) as svc, PointStream(svc.pub_endpoint, timeout_s=WAIT_S) as stream:
            info = stream.wait_sensor()  # serve sends it to a new subscriber at once: we are subscribed
            t.start()                    # only now the frames flow, so the stream sees every cloud
            clouds = [next(stream) for _ in range(len(stamps))]
            health = stream.wait_health()
    finally:
        stop.set()
        if t.is_alive():
            t.join(5)
    assert [c.seq for c in clouds] == sorted(stamps)
    n_points = 0
    for c in clouds:
        assert isinstance(c, Cloud) and c.points.dtype == RECORD_DTYPE
        want = expected.get(c.seq, np.empty(0, RECORD_DTYPE))
        assert c.points.tobytes() == want.tobytes(), f"frame {c.seq}"
        n_points += len(c)
        assert c.timestamp_s == stamps[c.seq]
        assert c.latency_s >= 0 and c.run == clouds[0].run
        assert c.sensor == sensor.sensor_id and c.summary == info.summary
    assert n_points == sum(len(v) for v in expected.values()) > 0
    # the summary carries the sensor file's figures (README "Wire format": the sensor kind's summary)
    assert info.sensor_id == sensor.sensor_id and info.digest == sensor.digest
    assert info.summary["max_range_m"] == pytest.approx(sensor.max_range_m)
    assert info.summary["range_resolution_m"] == pytest.approx(sensor.range_resolution_m)
    assert info.summary["pose"]["position_m"] == list(sensor.pose_position_m)
    assert info.sensor_toml == sensor.source_text
    # health: every field README lists for the health kind, as the latest one of the sensor
    assert stream.health[sensor.sensor_id] == health
    for name in HEALTH_INT_FIELDS + HEALTH_FLOAT_FIELDS:
        assert name in health, name
    assert health["frames_rejected"] == 0 and health["rejected"] == {}
    assert stream.gaps == 0 and stream.restarts == 0 and stream.dropped == {} and stream.out_of_order == 0
    assert stream.clouds == len(stamps) and stream.connected and stream.reconnects == 0


def test_skipped_sequence_numbers_are_gaps_and_a_new_run_is_a_restart():
    sensor = load_sensor(YARD_SENSOR)
    with CaptureReader(YARD) as reader:
        frames = [f.payload for f in reader][:4]
        assert capture_sensor(reader).digest == sensor.digest
    src_ep = f"tcp://127.0.0.1:{free_port()}"
    pub = AdcPublisher(sensor, src_ep)
    try:
        with running_service(sensor, src_ep) as svc, PointStream(svc.pub_endpoint, timeout_s=WAIT_S) as stream:
            assert pub.wait_for_subscribers(1, WAIT_S, threading.Event())
            stream.wait_sensor()
            sent = [0, 1, 2, 5, 6, 10, 11]  # 3, 4 and 7, 8, 9 never sent: 5 clouds missing
            for k, seq in enumerate(sent):  # lockstep: one frame, then its cloud
                pub.seq = seq
                pub.send(frames[k % len(frames)].copy(), 0.1 * seq)
                assert stream.next_cloud().seq == seq
            assert stream.gaps == 5 and stream.restarts == 0
            pub.run_id, pub.seq = "second-run", 0  # the source started again: a new run, seq from 0
            pub.send(frames[0].copy(), 2.0)
            cloud = stream.next_cloud()
            assert (cloud.run, cloud.seq) == ("second-run", 0)
            pub.seq = 3  # and a jump within the new run
            pub.send(frames[1].copy(), 2.3)
            assert stream.next_cloud().seq == 3
            assert stream.gaps == 5 + 2 and stream.restarts == 1 and stream.out_of_order == 0
            # serve counted the same frames missing on its side (README: sequence_gaps, source_restarts)
            health = stream.wait_health()
            assert health["sequence_gaps"] == 7 and health["source_restarts"] == 1
            assert stream.dropped == {}
    finally:
        pub.close()


# ---- messages built by hand on a PUB the test binds ---------------------------------------------------

@contextlib.contextmanager
def bound_xpub():
    ctx = zmq.Context()
    sock = ctx.socket(zmq.XPUB)
    sock.setsockopt(zmq.LINGER, 0)
    port = sock.bind_to_random_port("tcp://127.0.0.1")
    try:
        yield sock, f"tcp://127.0.0.1:{port}"
    finally:
        sock.close(0)
        ctx.term()


def wait_subscriptions(sock: zmq.Socket, n: int = 1) -> list[bytes]:
    """The first n subscription messages an XPUB receives (byte 1 + the topic prefix), bounded."""
    got = []
    while len(got) < n:
        assert sock.poll(int(WAIT_S * 1000), zmq.POLLIN), "no subscriber came"
        msg = sock.recv()
        if msg[:1] == b"\x01":
            got.append(msg[1:])
    return got


def records(n: int, first: float = 1.0) -> np.ndarray:
    rec = np.zeros(n, RECORD_DTYPE)
    for k, (name, _, dtype) in enumerate(POINT_WIRE_FIELDS):
        rec[name] = np.arange(n) * 10 + k + first if name != "frame" else 7
    return rec


def points_message(sensor_id: str, seq: int, rec: np.ndarray, *, run: str = "hand-run", **override) -> list:
    """A points message as README "Wire format" describes it, packed with msgpack directly."""
    header = {"wire": 3, "kind": "points", "sensor_id": sensor_id, "seq": seq, "run": run, "timestamp_s": 0.5 * seq,
              "latency_s": 0.002, "count": len(rec), "fields": [list(f) for f in POINT_WIRE_FIELDS]}
    header.update(override)
    return [f"{sensor_id}/points".encode(), msgpack.packb(header), rec.tobytes()]


def test_malformed_messages_are_counted_by_reason_and_the_stream_goes_on():
    with bound_xpub() as (pub, ep), PointStream(ep, timeout_s=WAIT_S) as stream:
        assert wait_subscriptions(pub) == [b""]  # every sensor: one empty prefix
        good = records(3)
        bad = [
            [b"yard-a/points", b"\x80"],                                          # two parts: malformed
            [b"yard-a/nothing", msgpack.packb({"wire": 3}), b""],                 # unknown kind: malformed
            points_message("yard-a", 0, good, wire=1),                            # version 1: wire_version
            points_message("yard-a", 0, good, count=4),                           # 3 records for 4: shape
            points_message("yard-a", 0, good, fields=[["x_m", "m", "<f4"]]),      # another layout: dtype
            [b"yard-a/points", msgpack.packb({"wire": 3, "pad": "x" * 70000}), b""],  # header > 64 KiB: oversized
            points_message("yard-a", 0, good)[:2] + [good.tobytes()[:-1]],        # one byte short: shape
        ]
        for parts in bad:
            pub.send_multipart(parts)
        pub.send_multipart(points_message("yard-a", 4, good))
        cloud = stream.next_cloud()
        assert stream.dropped == {"malformed": 2, "wire_version": 1, "shape": 2, "dtype": 1, "oversized": 1}
        assert stream.dropped_total == len(bad)
        assert cloud.seq == 4 and cloud.run == "hand-run" and cloud.sensor == "yard-a" and cloud.summary is None
        assert cloud.points.tobytes() == good.tobytes()
        assert cloud.timestamp_s == 2.0 and cloud.latency_s == 0.002
        # sequence numbers of hand-made clouds: behind the last (out of order, still delivered), a jump (gap)
        for seq in (3, 8):
            pub.send_multipart(points_message("yard-a", seq, good))
            assert stream.next_cloud().seq == seq
        assert stream.out_of_order == 1 and stream.gaps == 3  # 5, 6, 7
        # another sensor's sequence is its own
        pub.send_multipart(points_message("yard-b", 100, records(1)))
        assert stream.next_cloud().sensor == "yard-b" and stream.gaps == 3 and stream.restarts == 0


def test_sensor_id_filter_subscribes_to_that_sensor_only():
    with bound_xpub() as (pub, ep), PointStream(ep, sensor_id="yard-b", timeout_s=WAIT_S) as stream:
        assert sorted(wait_subscriptions(pub, 3)) == [b"yard-b/health", b"yard-b/points", b"yard-b/sensor"]
        pub.send_multipart(points_message("yard-a", 1, records(2)))
        pub.send_multipart(points_message("yard-b", 2, records(1, first=5.0)))
        cloud = stream.next_cloud()
        assert cloud.sensor == "yard-b" and cloud.seq == 2
        assert cloud.points.tobytes() == records(1, first=5.0).tobytes()


# ---- serve restarts, keys, timeouts -----------------------------------------------------------------

def next_of_run(stream: PointStream, run: str | None, other: bool, limit: int = 200) -> Cloud:
    """The next cloud whose run is (other=False) or is not (other=True) `run`, within `limit` clouds."""
    for _ in range(limit):
        c = stream.next_cloud()
        if (c.run != run) == other:
            return c
    raise AssertionError(f"no cloud {'outside' if other else 'of'} run {run} in {limit}")


def test_reconnects_after_serve_restarts_and_a_new_run_is_no_gap():
    sensor = load_sensor(YARD_SENSOR)
    pub_ep = f"tcp://127.0.0.1:{free_port()}"
    src_a, src_b = (f"tcp://127.0.0.1:{free_port()}" for _ in range(2))
    with PointStream(pub_ep, timeout_s=WAIT_S) as stream:
        with replaying(src_a, speed=1.0, loop=True, wait_s=WAIT_S):
            with serving(sensor, src_a, pub_ep):
                first = stream.next_cloud()
            before = stream.clouds
            last_seq = first.seq
            while stream.clouds < before + 1000:  # whatever serve sent before it stopped (bounded)
                try:
                    last_seq = stream.next_cloud(timeout_s=0.5).seq
                except PointStreamTimeout:
                    break
            assert stream.gaps == 0
            with serving(sensor, src_a, pub_ep):   # serve again on the same endpoint, the same source
                after = stream.next_cloud()
            assert after.run == first.run
            assert stream.reconnects == 1 and stream.restarts == 0
            # the frames the source sent while no serve ran are clouds missing within the run
            assert after.seq > last_seq and stream.gaps == after.seq - last_seq - 1
        gaps = stream.gaps
        with replaying(src_b, speed=1.0, loop=True, wait_s=WAIT_S), serving(sensor, src_b, pub_ep):
            c = next_of_run(stream, first.run, other=True)
            assert c.run != first.run
            c2 = stream.next_cloud()
        assert stream.reconnects == 2 and stream.restarts == 1
        assert stream.gaps == gaps + (c2.seq - c.seq - 1)  # the new run's seq from 0 adds no gap
        assert stream.dropped == {} and stream.out_of_order == 0


def test_keys_as_the_other_connecting_programs(tmp_path):
    for name in ("serve", "tracker"):
        create_keys(name, tmp_path / name)
    accepts = tmp_path / "serve-accepts"
    accepts.mkdir()
    shutil.copy(tmp_path / "tracker" / "tracker.key", accepts / "tracker.key")
    sensor = load_sensor(YARD_SENSOR)
    src_ep = f"tcp://127.0.0.1:{free_port()}"
    pub_keys = ServerKeys(tmp_path / "serve" / "serve.key_secret", accepts, clients="subscriber")
    with replaying(src_ep, speed=1.0, loop=True, wait_s=WAIT_S), \
            running_service(sensor, src_ep, pub_keys=pub_keys) as svc:
        with PointStream(svc.pub_endpoint, timeout_s=WAIT_S, server_key=tmp_path / "serve" / "serve.key",
                         key=tmp_path / "tracker" / "tracker.key_secret") as stream:
            cloud = stream.next_cloud()
            assert cloud.sensor == sensor.sensor_id and stream.handshakes_failed == 0
        with PointStream(svc.pub_endpoint, timeout_s=2.0) as bare:
            with pytest.raises(PointStreamTimeout, match="security handshake failed") as err:
                bare.next_cloud()
            assert svc.pub_endpoint in str(err.value) and bare.clouds == 0
    with pytest.raises(CubecastError, match="server_key= and key=: give both"):
        PointStream(svc.pub_endpoint, server_key=tmp_path / "serve" / "serve.key")
    with pytest.raises(CubecastError, match="key .*no such key file"):
        PointStream(svc.pub_endpoint, server_key=tmp_path / "serve" / "serve.key", key=tmp_path / "missing")


def test_timeout_names_the_endpoint_and_the_stream_stays_usable():
    ep = f"tcp://127.0.0.1:{free_port()}"  # nothing bound there
    with PointStream(ep, timeout_s=0.3) as stream:
        for _ in range(2):
            with pytest.raises(TimeoutError, match=f"{ep}: no point cloud within 0.3 s .*never connected"):
                next(stream)
    sensor = load_sensor(YARD_SENSOR)
    with running_service(sensor, f"tcp://127.0.0.1:{free_port()}") as svc:  # serve without a source
        with PointStream(svc.pub_endpoint, sensor_id=sensor.sensor_id) as stream:
            stream.wait_sensor(timeout_s=WAIT_S)
            with pytest.raises(PointStreamTimeout, match="of sensor 'yard-a' within 0.5 s .*connected; 0 clouds"):
                stream.next_cloud(timeout_s=0.5)


def test_stop_from_another_thread_ends_the_iteration_and_arguments_are_checked():
    with bound_xpub() as (pub, ep), PointStream(ep) as stream:
        timer = threading.Timer(0.2, stream.stop)
        timer.start()
        got = list(stream)  # no timeout: only stop() ends it
        timer.join()
        assert got == [] and stream.next_cloud() is None
    for kw, match in (({"timeout_s": 0}, "timeout_s 0: must be a number of seconds > 0"),
                      ({"timeout_s": float("nan")}, "timeout_s nan"),
                      ({"sensor_id": "a/b"}, "sensor_id 'a/b': must be"),
                      ({"rcvhwm": 0}, "rcvhwm 0")):
        with pytest.raises(CubecastError, match=match):
            PointStream("tcp://127.0.0.1:5602", **kw)
    with pytest.raises(CubecastError, match="PointStream endpoint tcp://127.0.0.1:99999: port"):
        PointStream("tcp://127.0.0.1:99999")
    stream = PointStream(f"tcp://127.0.0.1:{free_port()}")
    stream.close()
    stream.close()  # twice is harmless
    assert stream.next_cloud() is None


def test_import_alias():
    import cubecast.daemon as daemon
    assert daemon.PointStream is PointStream
