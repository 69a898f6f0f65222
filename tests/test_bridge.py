"""`cubecast bridge` (daemon/bridge.py) over real sockets on 127.0.0.1, every wait bounded: a WebSocket client
written here with the `websockets` library speaks the Foxglove WebSocket protocol to the bridge, and
decodes what it gets with general-purpose readers: protobuf messages with google.protobuf from the
schema the server advertises, JSON with the json module, the packed points with numpy from the field
list inside the message.

Protocol facts used (the Foxglove WebSocket protocol specification, foxglove/ws-protocol docs/spec.md,
from memory): the server sends a `serverInfo` and `advertise` text messages (channels with id, topic,
encoding, schemaName, schema, schemaEncoding; a protobuf schema is a base64 FileDescriptorSet); a
client sends {"op": "subscribe", "subscriptions": [{"id", "channelId"}]}; message data comes as a
binary message of opcode 0x01, a uint32 subscription id, a uint64 log time (ns) and the payload, all
little-endian. The subprotocol is "foxglove.websocket.v1" in the protocol's first versions; the SDK's
current server speaks "foxglove.sdk.v1": the client offers both and the server picks.
FrameTransform: a point p of the child frame is R p + t in the parent frame (the SDK's own doc of the
message). PointCloud fields and the Grid as the foxglove schemas define them (the SDK's message docs).
"""

from __future__ import annotations

import asyncio
import base64
import json
import logging
import signal
import struct
import subprocess
import sys
import threading
import time
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest
import websockets
import zmq
from google.protobuf import descriptor_pb2, descriptor_pool, message_factory
from scipy.spatial.transform import Rotation

from cubecast.daemon.bridge import Bridge, parse_websocket, point_fields, stamp_parts
from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.demo import free_port
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.process import process_frames
from cubecast.daemon.sensor import load_sensor, parse_sensor
from cubecast.daemon.sources import ReplaySource
from cubecast.daemon.wire import (FRONTEND_RECORD_DTYPE, HEALTH_FLOAT_FIELDS, HEALTH_INT_FIELDS,
                                  HEALTH_OPTIONAL_FLOAT_FIELDS, POINT_WIRE_FIELDS, RECORD_DTYPE, encode_frontend,
                                  encode_health, encode_points, encode_rdmap, encode_sensor, sensor_summary)
from tests.helpers import SAMPLES, YARD_SENSOR
from tests.test_pointstream import bound_xpub, wait_subscriptions
from tests.test_service import running_service

WAIT_S = 30.0
SUBPROTOCOLS = ["foxglove.sdk.v1", "foxglove.websocket.v1"]
NUMPY_OF = {"FLOAT32": "<f4", "FLOAT64": "<f8", "UINT32": "<u4", "INT32": "<i4", "UINT16": "<u2", "INT16": "<i2",
            "UINT8": "u1", "INT8": "i1"}


# ---- a Foxglove WebSocket client ------------------------------------------------------------------------

async def _collect(url: str, topics: set[str], need, deadline: float) -> dict:
    """Subscribe to `topics` as they are advertised; topic -> [(channel, payload)] until need(got) holds.
    A subscription that brought nothing for a second is sent again: the SDK's server can answer a
    subscription that follows an advertisement at once with "unknown channel" (seen in this suite)."""
    got: dict[str, list] = defaultdict(list)
    async with websockets.connect(url, subprotocols=SUBPROTOCOLS, max_size=None, open_timeout=10) as ws:
        assert ws.subprotocol in SUBPROTOCOLS
        subs: dict[int, dict] = {}      # subscription id -> channel
        wanted: dict[int, dict] = {}    # channel id -> channel, for the topics asked for
        sent: dict[int, float] = {}     # channel id -> when last subscribed

        async def subscribe(channels: list[dict]) -> None:
            batch = []
            for c in channels:
                subs[len(subs) + 1] = c
                batch.append({"id": len(subs), "channelId": c["id"]})
                sent[c["id"]] = time.monotonic()
            await ws.send(json.dumps({"op": "subscribe", "subscriptions": batch}))

        while not need(got):
            left = deadline - time.monotonic()
            assert left > 0, f"only {dict((k, len(v)) for k, v in got.items())} from {url}"
            stale = [c for cid, c in wanted.items() if not got.get(c["topic"]) and time.monotonic() - sent[cid] > 1.0]
            if stale:
                await subscribe(stale)
            try:
                raw = await asyncio.wait_for(ws.recv(), timeout=min(left, 0.5))
            except (asyncio.TimeoutError, TimeoutError):
                continue
            if isinstance(raw, str):
                m = json.loads(raw)
                if m.get("op") == "advertise":
                    new = [c for c in m["channels"] if c["topic"] in topics and c["id"] not in wanted]
                    wanted.update((c["id"], c) for c in new)
                    if new:
                        await subscribe(new)
            elif raw[0] == 0x01:
                sub_id, _log_time_ns = struct.unpack_from("<IQ", raw, 1)
                got[subs[sub_id]["topic"]].append((subs[sub_id], bytes(raw[13:])))
    return got


def collect(url: str, topics: set[str], need, timeout_s: float = WAIT_S) -> dict:
    return asyncio.run(_collect(url, topics, need, time.monotonic() + timeout_s))


def protobuf(channel: dict, payload: bytes):
    """Decode a protobuf message with google.protobuf from the channel's advertised schema."""
    assert channel["encoding"] == "protobuf" and channel["schemaEncoding"] == "protobuf"
    files = descriptor_pb2.FileDescriptorSet.FromString(base64.b64decode(channel["schema"])).file
    pool, pending = descriptor_pool.DescriptorPool(), list(files)
    for _ in range(len(files) + 1):  # dependencies first, whatever order the set lists them in
        rest = []
        for f in pending:
            try:
                pool.Add(f)
            except TypeError:
                rest.append(f)
        pending = rest
    assert not pending
    cls = message_factory.GetMessageClass(pool.FindMessageTypeByName(channel["schemaName"]))
    return cls.FromString(payload)


def cloud_array(msg) -> np.ndarray:
    """The points of a decoded foxglove.PointCloud as a numpy structured array, from its own field list."""
    enum = msg.DESCRIPTOR.fields_by_name["fields"].message_type.enum_types_by_name["NumericType"]
    names = [f.name for f in msg.fields]
    assert len(set(names)) == len(names)
    dtype = np.dtype({"names": names, "formats": [NUMPY_OF[enum.values_by_number[f.type].name] for f in msg.fields],
                      "offsets": [f.offset for f in msg.fields], "itemsize": msg.point_stride})
    return np.frombuffer(msg.data, dtype)


def check_cloud_fields(arr: np.ndarray, records: np.ndarray) -> None:
    """Every wire field under its name and with its values (a u64 as its 32-bit halves), and x, y, z."""
    assert len(arr) == len(records)
    for name, _, dtype in POINT_WIRE_FIELDS:
        if dtype == "<u8":
            whole = arr[f"{name}_lo"].astype(np.uint64) | (arr[f"{name}_hi"].astype(np.uint64) << np.uint64(32))
            assert np.array_equal(whole, records[name]), name
        else:
            assert arr.dtype[name] == np.dtype(dtype), name
            assert arr[name].tobytes() == np.ascontiguousarray(records[name]).tobytes(), name
    for alias, name in (("x", "x_m"), ("y", "y_m"), ("z", "z_m")):
        assert arr[alias].tobytes() == np.ascontiguousarray(records[name]).tobytes()


# ---- hand-made messages through the bridge ------------------------------------------------------------------

def posed_sensor():
    text = (SAMPLES / "tractor_right_sensor.toml").read_text()
    assert "roll_deg = 0.0" in text
    return parse_sensor(text.replace("roll_deg = 0.0", "roll_deg = 4.0"), "test")  # yaw 60, pitch -3, roll 4


def hand_records(n: int) -> np.ndarray:
    rec = np.zeros(n, RECORD_DTYPE)
    for k, (name, _, _) in enumerate(POINT_WIRE_FIELDS):
        rec[name] = np.arange(n) * 3.25 - k * 1.5
    rec["frame"] = 2 ** 40 + 5   # beyond 32 bits: both halves matter
    rec["timestamp_s"] = 1.7e9 + 0.25
    return rec


def health_fields() -> dict:
    h = {name: k for k, name in enumerate(HEALTH_INT_FIELDS)}
    h |= {name: 0.5 + k for k, name in enumerate(HEALTH_FLOAT_FIELDS)}
    h |= {name: None for name in HEALTH_OPTIONAL_FLOAT_FIELDS}
    h["rejected"] = {"crc": 2}
    return h


FRONT_RECORDS = np.zeros(3, FRONTEND_RECORD_DTYPE)
FRONT_RECORDS["samples"] = 4096
FRONT_RECORDS["clipped_samples"] = [0, 7, 0]
FRONT_RECORDS["noise_floor_db"] = [12.5, 12.75, -np.inf]
FRONT_RECORDS["image_rejection_db"] = [40.0, 35.5, 120.0]
FRONT_WARNINGS = [{"rx": 1, "cause": "clipping", "value": 0.17, "short": "rx 1 clipping 0.17 %",
                   "text": "rx 1: 0.17 % of samples clipped (a strong near reflector, or too much receiver gain)"}]


def test_points_map_health_and_pose_reach_a_websocket_client():
    sensor = posed_sensor()
    sid = sensor.sensor_id
    rec = hand_records(5)
    rdmap = np.arange(12 * 8, dtype="<f4").reshape(12, 8) / 7.0
    axes = (0.4, 0.2, -3.0, 0.25)  # range start and step, velocity start and step
    stop_pub = threading.Event()
    with bound_xpub() as (pub, ep):
        bridge = Bridge(ep, "ws://127.0.0.1:0")
        port = bridge.start()
        stop = threading.Event()
        errors: list = []

        def run():
            try:
                bridge.run(stop)
            except BaseException as exc:
                errors.append(exc)

        t = threading.Thread(target=run, daemon=True)
        t.start()
        try:
            assert wait_subscriptions(pub) == [b""]
            # a cloud the viewer's stamps cannot hold comes first: not sent, counted
            pub.send_multipart(encode_points(sid, 0, "hand", -1.0, 0.001, rec))

            def publish():  # until the client has what it needs (its subscriptions follow the advertisements)
                for k in range(1, 600):
                    if stop_pub.wait(0.05):
                        return
                    pub.send_multipart(encode_sensor(sensor))
                    pub.send_multipart(encode_points(sid, k, "hand", 1.7e9 + 0.25, 0.001, rec))
                    pub.send_multipart(encode_rdmap(sid, k, 1.7e9 + 0.5, rdmap, *axes))
                    pub.send_multipart(encode_health(sid, health_fields()))
                    pub.send_multipart(encode_frontend(sid, k, "hand", 1.7e9 + 0.25, FRONT_RECORDS, 2048.0,
                                                       FRONT_WARNINGS))

            p = threading.Thread(target=publish, daemon=True)
            p.start()
            topics = {f"/{sid}/{w}" for w in ("points", "transform", "rdmap", "rdmap_image", "health", "sensor",
                                              "frontend")}
            got = collect(f"ws://127.0.0.1:{port}", topics, lambda g: all(g.get(tp) for tp in topics))
        finally:
            stop_pub.set()
            stop.set()
            t.join(10)
            assert not t.is_alive() and not errors, errors
    assert bridge.counts["unstamped"] == 1 and bridge.counts["clouds"] >= 1

    # the cloud: every field by name and type, values as published, frame id the sensor, stamp the frame's
    channel, payload = got[f"/{sid}/points"][0]
    assert channel["schemaName"] == "foxglove.PointCloud"
    msg = protobuf(channel, payload)
    assert msg.frame_id == sid and (msg.timestamp.seconds, msg.timestamp.nanos) == (1_700_000_000, 250_000_000)
    assert msg.point_stride == RECORD_DTYPE.itemsize == 80
    check_cloud_fields(cloud_array(msg), rec)

    # the pose: the child frame's points reach the platform frame as the sensor file's pose takes them
    # (Sensor.to_platform, itself tested against hand-worked rotations and scipy in tests/test_pose.py)
    tf = protobuf(*got[f"/{sid}/transform"][0])
    assert (tf.parent_frame_id, tf.child_frame_id) == ("platform", sid)
    rot = Rotation.from_quat([tf.rotation.x, tf.rotation.y, tf.rotation.z, tf.rotation.w])
    t_m = np.array([tf.translation.x, tf.translation.y, tf.translation.z])
    probe = np.array([[0.0, 1.0, 0.0], [2.0, 5.0, -1.0], [-3.0, 0.5, 2.5]])
    assert np.allclose(rot.apply(probe) + t_m, sensor.to_platform(probe), atol=1e-9)
    assert np.allclose(t_m, [1.1, 2.9, 1.1])

    # the map as a grid: cell centres at start + k step (README "Wire format"), so the origin is a half cell off
    grid = protobuf(*got[f"/{sid}/rdmap"][0])
    assert grid.column_count == 8 and grid.row_stride == 32 and grid.cell_stride == 4
    assert (grid.cell_size.x, grid.cell_size.y) == (0.25, 0.2)
    assert grid.pose.position.x == pytest.approx(-3.0 - 0.125) and grid.pose.position.y == pytest.approx(0.4 - 0.1)
    assert [f.name for f in grid.fields] == ["level_db"] and grid.fields[0].offset == 0
    assert np.array_equal(np.frombuffer(grid.data, "<f4").reshape(12, 8), rdmap)
    image = protobuf(*got[f"/{sid}/rdmap_image"][0])
    assert (image.width, image.height, image.encoding, image.step) == (8, 12, "32FC1", 32)
    assert np.array_equal(np.frombuffer(image.data, "<f4").reshape(12, 8), rdmap)

    # health and the sensor as JSON
    channel, payload = got[f"/{sid}/health"][0]
    assert channel["encoding"] == "json" and channel["schemaEncoding"] == "jsonschema"
    assert json.loads(payload) == health_fields()
    schema = json.loads(channel["schema"])
    assert set(HEALTH_INT_FIELDS) <= set(schema["properties"])
    # the front end's monitor as JSON: the wire header's fields as they are, nil where not finite
    channel, payload = got[f"/{sid}/frontend"][0]
    assert channel["encoding"] == "json" and channel["schemaEncoding"] == "jsonschema"
    front = json.loads(payload)
    assert front["sensor_id"] == sid and front["run"] == "hand" and front["timestamp_s"] == 1.7e9 + 0.25
    assert front["full_scale"] == 2048.0 and front["warnings"] == FRONT_WARNINGS and front["warnings_total"] == 1
    assert front["records"]["clipped_samples"] == [0, 7, 0] and front["records"]["samples"] == [4096] * 3
    assert front["records"]["noise_floor_db"] == [12.5, 12.75, None]
    assert front["records"]["image_rejection_db"] == [40.0, 35.5, 120.0]
    assert set(json.loads(channel["schema"])["properties"]["records"]["properties"]) == set(FRONT_RECORDS.dtype.names)
    assert bridge.counts["frontend"] >= 1
    info = json.loads(got[f"/{sid}/sensor"][0][1])
    assert info["digest"] == sensor.digest and info["sensor_toml"] == sensor.source_text
    assert info["summary"] == json.loads(json.dumps(sensor_summary(sensor)))


# ---- a live serve, through the command ------------------------------------------------------------------------

def test_cli_bridge_serves_live_clouds_equal_to_the_chain():
    sensor = load_sensor(YARD_SENSOR)
    with CaptureReader(SAMPLES / "yard.cap") as r:
        reference = process_frames(r, Pipeline(sensor))
    src_ep = f"tcp://127.0.0.1:{free_port()}"
    source = ReplaySource(SAMPLES / "yard.cap", src_ep, speed=1.0, loop=True)
    source.bind()
    stop = threading.Event()
    t = threading.Thread(target=source.run, args=(stop,), daemon=True)
    t.start()
    port = free_port()
    proc = None
    try:
        with running_service(sensor, src_ep) as svc:
            proc = subprocess.Popen([sys.executable, "-m", "cubecast.daemon.cli", "bridge", "--sub", svc.pub_endpoint,
                                     "--websocket", f"ws://127.0.0.1:{port}", "--seconds", "120"],
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            deadline = time.monotonic() + WAIT_S
            got = None
            while got is None:  # until the server listens (bounded)
                try:
                    topic = f"/{sensor.sensor_id}/points"
                    got = collect(f"ws://127.0.0.1:{port}", {topic}, lambda g: len(g.get(topic, [])) >= 3,
                                  timeout_s=max(1.0, deadline - time.monotonic()))
                except OSError:
                    assert time.monotonic() < deadline and proc.poll() is None, proc.stderr.read()
                    time.sleep(0.2)
            proc.send_signal(signal.SIGTERM)
            _, err = proc.communicate(timeout=10)
            assert proc.returncode == 0, err
            assert "cubecast bridge: serving ws://127.0.0.1:" in err and "cubecast bridge: stopped:" in err
    finally:
        stop.set()
        t.join(5)
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait(5)
    n = len(reference)
    assert all(len(x) for x in reference)  # every frame of the yard has points: each cloud names its frame
    for channel, payload in got[f"/{sensor.sensor_id}/points"]:
        msg = protobuf(channel, payload)
        arr = cloud_array(msg)
        frame = int(arr["frame_lo"][0]) | int(arr["frame_hi"][0]) << 32
        want = reference[frame % n].copy()  # a looping replay: seq and timestamps go on, the frames repeat
        want["frame"] = frame
        want["timestamp_s"] = arr["timestamp_s"][0]
        check_cloud_fields(arr, want)
        assert msg.frame_id == sensor.sensor_id
        assert (msg.timestamp.seconds, msg.timestamp.nanos) == stamp_parts(float(arr["timestamp_s"][0]))


# ---- the address rule and the pure parts ----------------------------------------------------------------------

def test_websocket_beyond_loopback_needs_insecure_and_bad_addresses_are_named(caplog):
    r = subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", "bridge", "--websocket", "ws://0.0.0.0:0"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert "--websocket ws://0.0.0.0:0: reachable from other hosts" in r.stderr and "--insecure" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    with caplog.at_level(logging.WARNING, logger="cubecast.daemon.bridge"):
        assert parse_websocket("ws://0.0.0.0:8765", insecure=True) == ("0.0.0.0", 8765)  # parsed, not bound
    assert "bound without keys (--insecure)" in caplog.text
    for url in ("ws://127.0.0.1:8765", "ws://localhost:0", "ws://[::1]:9000/"):
        parse_websocket(url)
    for url, why in (("http://127.0.0.1:8765", "must be ws://HOST:PORT"), ("ws://127.0.0.1:99999", "port '99999'"),
                     ("ws://127.0.0.1", "must be ws://HOST:PORT"), ("ws://*:8765", "wildcard"),
                     ("ws://300.1.1.1:80", "not an IPv4 address")):
        with pytest.raises(CubecastError, match=why):
            parse_websocket(url)
    with pytest.raises(CubecastError, match="--sub tcp://127.0.0.1:0: port 0"):
        Bridge("tcp://127.0.0.1:0", "ws://127.0.0.1:0")
    with pytest.raises(CubecastError, match="--server-key and --key: give both"):
        Bridge("tcp://127.0.0.1:5602", "ws://127.0.0.1:0", server_key="serve.key")


def test_point_fields_cover_the_record_and_stamps():
    fields = point_fields()
    names = [n for n, _, _ in fields]
    assert names[:2] == ["frame_lo", "frame_hi"] and names[-3:] == ["x", "y", "z"]
    assert len(fields) == len(POINT_WIRE_FIELDS) + 1 + 3
    covered = sorted((o, o + np.dtype(NUMPY_OF[t.upper()]).itemsize) for _, o, t in fields[:-3])
    assert covered[0][0] == 0 and covered[-1][1] == RECORD_DTYPE.itemsize
    assert all(a[1] == b[0] for a, b in zip(covered, covered[1:]))  # no byte twice, none left out
    assert stamp_parts(1.5) == (1, 500_000_000) and stamp_parts(0.0) == (0, 0)
    assert stamp_parts(-0.1) is None and stamp_parts(2.0 ** 32) is None and stamp_parts(float("nan")) is None
