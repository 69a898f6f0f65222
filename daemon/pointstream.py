"""The client library for trackers: iterate over a daemon's point clouds, decoded and validated.

    from cubecast.daemon.pointstream import PointStream

    with PointStream("tcp://127.0.0.1:5602", timeout_s=5.0) as stream:
        for cloud in stream:
            cloud.points          # numpy structured array of wire.RECORD_DTYPE (read-only; copy to modify)
            cloud.seq, cloud.run, cloud.timestamp_s, cloud.latency_s
            cloud.sensor          # the sensor id; cloud.summary: its latest `sensor` summary, when known
            stream.health         # sensor id -> the latest health map
            stream.gaps, stream.dropped, stream.reconnects

Every message is decoded by the wire module (cubecast.daemon.wire.decode, the contract the daemon, the
workers and the viewer use); nothing is decoded here. What the wire refuses is counted by reason in
`dropped` (the stream goes on with the next message). Sequence numbers are followed per sensor: a jump
within a run adds the missing clouds to `gaps` (as serve's `sequence_gaps` does for ADC frames), a
new `run` (a restarted source) is counted in `restarts` and is no gap, a sequence number not after the
last one of its run in `out_of_order` (the cloud is still delivered). Lost clouds show as gaps whether
serve dropped the frame (its health says `frames_dropped`), the network lost them, or this reader fell
behind by more than `rcvhwm` messages.

Timeout: with `timeout_s`, waiting longer than that for the next cloud raises PointStreamTimeout (a
TimeoutError, and a CubecastError) naming the endpoint and what was seen (never connected, keys
refused, messages refused by reason). The stream stays usable: catch it and iterate again. Without
`timeout_s` the iteration waits for ever; `stop()` (from any thread) or `close()` ends it.

Connections: ZeroMQ dials again by itself when the daemon goes away and comes back; every connection
made after the first is counted in `reconnects`. A connection ZeroMQ gives up (a message part over
netio.MAX_PART_BYTES, a byte stream that is not ZeroMQ's, a refused key) is dialled again here after
netio.REDIAL_CHECK_S, backing off to netio.REDIAL_MAX_S, as serve's subscriber does.

Keys (README "Keys"): a daemon that requires keys is reached with `server_key=` (its public key,
NAME.key) and `key=` (this side's secret key, NAME.key_secret, made with `cubecast keys`, whose
public half is in the daemon's --client-keys folder), or `keys=` a keys.ClientKeys.

Use one PointStream from one thread (ZeroMQ sockets are not thread-safe); only stop() may be called
from another. Diagnostics go to the `logging` module (logger cubecast.daemon.pointstream), never print.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np
import zmq
from zmq.utils.monitor import recv_monitor_message

from . import wire
from .errors import CubecastError, is_real
from .keys import HANDSHAKE_FAILED_EVENTS, ClientKeys
from .logs import RateLimitFilter, log_limited
from .netio import DEFAULT_PUB, MAX_PART_BYTES, REDIAL_CHECK_S, REDIAL_MAX_S, WARN_INTERVAL_S, connect_socket

__all__ = ["PointStream", "Cloud", "SensorInfo", "StreamMessage", "PointStreamTimeout", "RECORD_DTYPE"]

RECORD_DTYPE = wire.RECORD_DTYPE
POLL_SLICE_MS = 100   # the longest single wait: stop() and Ctrl-C are noticed within it
DEFAULT_RCVHWM = 1000  # messages ZeroMQ keeps for a reader that falls behind (beyond: lost, seen as gaps)

log = logging.getLogger(__name__)

_EVENTS = (zmq.EVENT_CONNECTED | zmq.EVENT_CONNECT_DELAYED | zmq.EVENT_CONNECT_RETRIED | zmq.EVENT_DISCONNECTED
           | zmq.EVENT_HANDSHAKE_SUCCEEDED | HANDSHAKE_FAILED_EVENTS)


class PointStreamTimeout(CubecastError, TimeoutError):
    """No point cloud within the stream's timeout_s; the message names the endpoint and what was seen."""


@dataclass(frozen=True)
class SensorInfo:
    """The latest `sensor` message of one sensor: its description digest, the summary map (max_range_m,
    max_velocity_mps, fov_half_azimuth_deg, fov_half_elevation_deg, range_resolution_m,
    velocity_resolution_mps, pose, and mount_height_m when given) and the full description text."""

    sensor_id: str
    digest: str
    summary: dict
    sensor_toml: str
    received_s: float


@dataclass(frozen=True)
class Cloud:
    """One point cloud. `points`: wire.RECORD_DTYPE records (a read-only view on the received bytes);
    `seq` and `run`: the ADC frame's sequence number and source run; `timestamp_s`: the ADC frame's
    timestamp; `latency_s`: serve's time from receiving the frame to publishing its points; `sensor`:
    the sensor id; `summary`: that sensor's latest summary map when a `sensor` message came (else None);
    `received_s`: time.monotonic() when this side took it off the socket."""

    points: np.ndarray
    seq: int
    run: str
    timestamp_s: float
    latency_s: float
    sensor: str
    summary: dict | None
    received_s: float

    def __len__(self) -> int:
        return int(self.points.shape[0])


class StreamMessage(NamedTuple):
    """One message of next_message(): kind 'points' (value a Cloud), 'sensor' (a SensorInfo), 'health'
    (its map) or, with rdmap=True, 'rdmap' (the wire.Message: `data` float32 dB [range, doppler], the
    header's axes), with frontend=True, 'frontend' (the wire.Message: `data` the front end's records, one
    per receive channel, the header's `warnings`)."""

    kind: str
    sensor: str
    value: object


def _check_timeout(value, name: str) -> float | None:
    if value is None:
        return None
    if not is_real(value) or not math.isfinite(value) or value <= 0:
        raise CubecastError(f"{name} {value!r}: must be a number of seconds > 0, or None to wait for ever")
    return float(value)


def _client_keys(server_key, key, keys: ClientKeys | None) -> ClientKeys | None:
    if keys is not None:
        if server_key is not None or key is not None:
            raise CubecastError("keys=: give either keys or server_key= and key=, not both")
        if not isinstance(keys, ClientKeys):
            raise CubecastError(f"keys={keys!r}: must be a cubecast.daemon.keys.ClientKeys")
        return keys
    if server_key is None and key is None:
        return None
    if server_key is None or key is None:
        raise CubecastError("server_key= and key=: give both (the daemon's public key NAME.key and this side's "
                            "secret key NAME.key_secret) or neither")
    return ClientKeys.from_files(Path(server_key), Path(key), server_role="server_key", key_role="key")


class PointStream:
    """Iterate over the point clouds a daemon publishes (see the module's doc).

    endpoint: serve's publish endpoint (default tcp://127.0.0.1:5602). sensor_id: only this sensor's
    messages (a ZeroMQ subscription to its points, sensor and health topics); default every sensor on
    the bus. timeout_s: see PointStreamTimeout. server_key / key / keys: CURVE keys. context: a
    zmq.Context to use (default: one of its own, terminated by close()). rcvhwm: messages ZeroMQ keeps
    while this reader is busy. max_payload_bytes: the largest payload accepted (larger: dropped as
    'oversized'). rdmap: also take the range-Doppler maps (next_message() returns them, `rdmaps` keeps the
    latest per sensor id). frontend: also take the front end's monitors (next_message() returns them,
    `frontends` keeps the latest per sensor id). stop: an event that ends the iteration when set (stop()
    sets it)."""

    def __init__(self, endpoint: str = DEFAULT_PUB, *, sensor_id: str | None = None, timeout_s: float | None = None,
                 server_key: str | Path | None = None, key: str | Path | None = None,
                 keys: ClientKeys | None = None, context: zmq.Context | None = None,
                 rcvhwm: int = DEFAULT_RCVHWM, max_payload_bytes: int = wire.DEFAULT_MAX_PAYLOAD_BYTES,
                 rdmap: bool = False, frontend: bool = False, stop: threading.Event | None = None):
        if sensor_id is not None and not wire.valid_sensor_id(sensor_id):
            raise CubecastError(f"sensor_id {sensor_id!r}: must be {wire.SENSOR_ID_RULE}")
        self.endpoint = endpoint
        self.sensor_id = sensor_id
        self.timeout_s = _check_timeout(timeout_s, "timeout_s")
        self.keys = _client_keys(server_key, key, keys)
        if isinstance(rcvhwm, bool) or not isinstance(rcvhwm, int) or rcvhwm < 1:
            raise CubecastError(f"rcvhwm {rcvhwm!r}: must be a whole number of messages >= 1")
        self._rcvhwm = rcvhwm
        self.max_payload_bytes = int(max_payload_bytes)
        self.kinds = (("points", "sensor", "health") + (("rdmap",) if rdmap else ())
                      + (("frontend",) if frontend else ()))
        # what came in
        self.sensors: dict[str, SensorInfo] = {}      # sensor id -> its latest `sensor` message
        self.health: dict[str, dict] = {}             # sensor id -> its latest health map (header fields)
        self.rdmaps: dict[str, wire.Message] = {}     # sensor id -> its latest range-Doppler map (rdmap=True)
        self.frontends: dict[str, wire.Message] = {}  # sensor id -> its latest front-end monitor (frontend=True)
        self.clouds = 0                               # point clouds delivered
        self.ignored = 0                              # valid messages of other kinds (rdmap, adc)
        self.dropped: dict[str, int] = {}             # messages the wire refused, by reason (wire.REASONS)
        self.last_error = ""                          # the last refusal, "reason: message"
        self.gaps = 0                                 # clouds missing within a run (sum of the seq jumps)
        self.restarts = 0                             # a new run of a sensor's source
        self.out_of_order = 0                         # a seq not after the last one of its run
        # the connection
        self.connections = 0                          # handshakes that succeeded (connections made)
        self.handshakes_failed = 0                    # security handshakes refused or failed (keys)
        self.protocol_errors = 0                      # connections ZeroMQ gave up, dialled again here
        self.connected = False
        self._last: dict[str, tuple[str, int]] = {}   # sensor id -> (run, seq) of its last cloud
        self._lost_at: float | None = None
        self._after_handshake = False
        self._tries = 0
        self._limit = RateLimitFilter(WARN_INTERVAL_S)
        self._stop = stop if stop is not None else threading.Event()
        self._closed = False
        self._own_ctx = context is None
        self._ctx = context or zmq.Context()
        self._sock = self._monitor = None
        try:
            self._open()
        except BaseException:
            self.close()
            raise

    def _open(self) -> None:
        sock = self._sock = self._ctx.socket(zmq.SUB)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.RCVHWM, self._rcvhwm)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_PART_BYTES)
        if self.sensor_id is None:
            sock.setsockopt(zmq.SUBSCRIBE, b"")
        else:
            for kind in self.kinds:
                sock.setsockopt(zmq.SUBSCRIBE, wire.topic_of(self.sensor_id, kind))
        self._monitor = sock.get_monitor_socket(_EVENTS)
        self._connect()
        self._poller = zmq.Poller()
        self._poller.register(sock, zmq.POLLIN)
        self._poller.register(self._monitor, zmq.POLLIN)

    # ---- public -----------------------------------------------------------------------------------

    @property
    def reconnects(self) -> int:
        """Connections made again after the first (ZeroMQ's own redials and this side's)."""
        return max(0, self.connections - 1)

    @property
    def dropped_total(self) -> int:
        return sum(self.dropped.values())

    def summary(self, sensor_id: str) -> dict | None:
        """The latest summary map of a sensor, or None before its first `sensor` message."""
        info = self.sensors.get(sensor_id)
        return info.summary if info is not None else None

    def stats(self) -> dict:
        """Every counter, as one JSON-able dict."""
        return {"endpoint": self.endpoint, "clouds": self.clouds, "ignored": self.ignored,
                "dropped": dict(self.dropped), "gaps": self.gaps, "restarts": self.restarts,
                "out_of_order": self.out_of_order, "connected": self.connected, "reconnects": self.reconnects,
                "handshakes_failed": self.handshakes_failed, "protocol_errors": self.protocol_errors}

    def __iter__(self) -> PointStream:
        return self

    def __next__(self) -> Cloud:
        cloud = self.next_cloud()
        if cloud is None:
            raise StopIteration
        return cloud

    def next_cloud(self, timeout_s: float | None = ...) -> Cloud | None:
        """The next point cloud; None once stop() or close() was called. timeout_s: this call's own
        (default the stream's); PointStreamTimeout when it passes."""
        timeout = self.timeout_s if timeout_s is ... else _check_timeout(timeout_s, "timeout_s")
        return self._pump("points", None, timeout)

    def wait_sensor(self, sensor_id: str | None = None, timeout_s: float | None = ...) -> SensorInfo | None:
        """Wait for a `sensor` message (of sensor_id, or of any sensor) and return it: serve sends one to each
        new subscriber at once, so this also shows that the subscription is in place. Returns the one
        already held, if any. Point clouds that arrive meanwhile are counted but not kept."""
        sid = sensor_id or self.sensor_id
        held = self.sensors.get(sid) if sid else next(iter(self.sensors.values()), None)
        if held is not None:
            return held
        timeout = self.timeout_s if timeout_s is ... else _check_timeout(timeout_s, "timeout_s")
        return self._pump("sensor", sid, timeout)

    def wait_health(self, sensor_id: str | None = None, timeout_s: float | None = ...) -> dict | None:
        """Wait for the next health message (of sensor_id, or of any sensor; serve sends one a second) and
        return its map; it is also kept in `health`. Point clouds that arrive meanwhile are counted, not kept."""
        timeout = self.timeout_s if timeout_s is ... else _check_timeout(timeout_s, "timeout_s")
        return self._pump("health", sensor_id or self.sensor_id, timeout)

    def next_message(self, timeout_s: float | None = ...) -> StreamMessage | None:
        """The next message of any kind taken (points, sensor, health; rdmap with rdmap=True, frontend
        with frontend=True), counted as the iteration counts it; None once stopped. PointStreamTimeout
        when none comes within timeout_s."""
        timeout = self.timeout_s if timeout_s is ... else _check_timeout(timeout_s, "timeout_s")
        return self._pump(None, None, timeout)

    def stop(self) -> None:
        """End the iteration (from any thread): the waiting call returns None / StopIteration."""
        self._stop.set()

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._stop.set()
        self._limit.flush(log, force=True, prefix=f"PointStream {self.endpoint}: ")
        if self._sock is not None:
            if self._monitor is not None:
                try:
                    self._sock.disable_monitor()
                except zmq.ZMQError:
                    pass
                self._monitor.close(linger=0)
            self._sock.close(linger=0)
        self._sock = self._monitor = None
        if self._own_ctx and self._ctx is not None:
            self._ctx.term()
        self._ctx = None

    def __enter__(self) -> PointStream:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __del__(self):  # a stream left open: free its sockets without waiting for the interpreter's exit
        try:
            if not self._closed and self._own_ctx:
                self.close()
        except Exception:
            pass

    # ---- the receiving loop -----------------------------------------------------------------------

    def _pump(self, want: str | None, sensor_id: str | None, timeout_s: float | None):
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        while not self._stop.is_set():
            wait_ms = POLL_SLICE_MS
            if deadline is not None:  # checked on every message too: a flood of other kinds is no reply
                left = deadline - time.monotonic()
                if left <= 0:
                    raise PointStreamTimeout(self._timeout_message(want, sensor_id, timeout_s))
                wait_ms = max(1, min(POLL_SLICE_MS, math.ceil(left * 1000)))
            ready = dict(self._poller.poll(0)) or dict(self._poller.poll(wait_ms))
            if self._monitor in ready:
                self._events()
            self._redial()
            if self._sock in ready:
                try:
                    parts = self._sock.recv_multipart(zmq.NOBLOCK, copy=False)
                except zmq.Again:
                    continue
                got = self._ingest(parts)
                del parts  # an oversized part is freed now
                if got is None:
                    continue
                if want is None:
                    return StreamMessage(*got)
                if got[0] == want and (want == "points" or sensor_id in (None, got[1])):
                    return got[2]
        return None

    def _timeout_message(self, want: str, sensor_id: str | None, timeout_s: float) -> str:
        what = {"points": "point cloud", "sensor": "sensor message", "health": "health message", None: "message"}[want]
        sid = sensor_id or self.sensor_id
        of = f" of sensor '{sid}'" if sid else ""
        if self.handshakes_failed and not self.connected:
            seen = (f"the security handshake failed {self.handshakes_failed} times: keys on one side only, or "
                    "this side's public key is not in the daemon's --client-keys folder")
        elif not self.connections:
            seen = "never connected: is serve running and publishing there?"
        else:
            seen = ("connected" if self.connected else "connection lost") + f"; {self.clouds} clouds so far"
            if self.dropped:
                seen += ", refused: " + ", ".join(f"{k} {v}" for k, v in sorted(self.dropped.items()))
                seen += f" (last: {self.last_error})"
        return f"{self.endpoint}: no {what}{of} within {timeout_s:g} s ({seen})"

    def _ingest(self, parts) -> tuple[str, str, object] | None:
        now = time.monotonic()
        try:
            msg = wire.decode(parts, max_payload_bytes=self.max_payload_bytes)
        except wire.WireError as exc:
            self.dropped[exc.reason] = self.dropped.get(exc.reason, 0) + 1
            self.last_error = f"{exc.reason}: {exc}"[:300]
            log_limited(log, self._limit, logging.WARNING, exc.reason, "PointStream %s: refused a message (%s): %s",
                        self.endpoint, exc.reason, exc)
            return None
        if self.sensor_id is not None and msg.sensor_id != self.sensor_id:
            self.ignored += 1
            return None
        if msg.kind == "points":
            return "points", msg.sensor_id, self._cloud(msg, now)
        if msg.kind == "sensor":
            h = msg.header
            info = SensorInfo(msg.sensor_id, h["digest"], h["summary"], h["sensor_toml"], now)
            self.sensors[msg.sensor_id] = info
            return "sensor", msg.sensor_id, info
        if msg.kind == "health":
            self.health[msg.sensor_id] = {k: v for k, v in msg.header.items() if k not in ("wire", "kind", "sensor_id")}
            return "health", msg.sensor_id, self.health[msg.sensor_id]
        if msg.kind == "rdmap" and "rdmap" in self.kinds:
            self.rdmaps[msg.sensor_id] = msg
            return "rdmap", msg.sensor_id, msg
        if msg.kind == "frontend" and "frontend" in self.kinds:
            self.frontends[msg.sensor_id] = msg
            return "frontend", msg.sensor_id, msg
        self.ignored += 1
        return None

    def _cloud(self, msg: wire.Message, now: float) -> Cloud:
        h, sid = msg.header, msg.sensor_id
        run, seq = h["run"], h["seq"]
        prev = self._last.get(sid)
        if prev is not None:
            if run != prev[0]:
                self.restarts += 1
                log.info("PointStream %s: sensor '%s': a new run %r (was %r)", self.endpoint, sid, run, prev[0])
            elif seq > prev[1] + 1:
                self.gaps += seq - prev[1] - 1
                log.debug("PointStream %s: sensor '%s': %d clouds missing before seq %d", self.endpoint, sid,
                          seq - prev[1] - 1, seq)
            elif seq <= prev[1]:
                self.out_of_order += 1
                log_limited(log, self._limit, logging.WARNING, "out of order",
                            "PointStream %s: sensor '%s': seq %d after %d in run %r", self.endpoint, sid, seq,
                            prev[1], run)
        if prev is None or run != prev[0] or seq > prev[1]:
            self._last[sid] = (run, seq)
        self.clouds += 1
        info = self.sensors.get(sid)
        return Cloud(msg.data, seq, run, h["timestamp_s"], h["latency_s"], sid,
                     info.summary if info is not None else None, now)

    # ---- connection events and redials (as netio.Subscriber does) --------------------------------

    def _connect(self) -> None:
        if self.keys is not None:
            self.keys.apply(self._sock)  # the options of the connection made next
        connect_socket(self._sock, self.endpoint, "PointStream endpoint")

    def _events(self) -> None:
        while True:
            try:
                ev = recv_monitor_message(self._monitor, zmq.NOBLOCK)
            except zmq.Again:
                return
            e = ev["event"]
            if e == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self.connections += 1
                self.connected = True
                self._tries = 0
                self._after_handshake = False
                if self.connections > 1:
                    log.info("PointStream %s: connected again", self.endpoint)
            elif e & HANDSHAKE_FAILED_EVENTS:
                self.handshakes_failed += 1
                self._after_handshake = True
                log_limited(log, self._limit, logging.WARNING, "handshake failed",
                            "PointStream %s: the security handshake failed (%s)", self.endpoint,
                            "the daemon refused this side's key" if e == zmq.EVENT_HANDSHAKE_FAILED_AUTH
                            else "keys on one side only, or a wrong public key for the daemon")
            elif e == zmq.EVENT_DISCONNECTED:
                if self.connected:
                    log.info("PointStream %s: connection lost", self.endpoint)
                self.connected = False
                self._lost_at = time.monotonic()
            elif e in (zmq.EVENT_CONNECT_RETRIED, zmq.EVENT_CONNECT_DELAYED, zmq.EVENT_CONNECTED):
                self._lost_at = None  # ZeroMQ dials again by itself (a daemon that went away)

    def _redial(self) -> None:
        """A connection ZeroMQ gave up (protocol error, refused handshake): dial again, backing off."""
        if self._lost_at is None or time.monotonic() - self._lost_at < min(REDIAL_MAX_S,
                                                                            REDIAL_CHECK_S * 2 ** self._tries):
            return
        self._lost_at = None
        self._tries += 1
        if not self._after_handshake:
            self.protocol_errors += 1
            log_limited(log, self._limit, logging.WARNING, "connection dropped",
                        "PointStream %s: ZeroMQ dropped the connection (a message part over %d bytes, or a byte "
                        "stream that is not ZeroMQ's); connecting again", self.endpoint, MAX_PART_BYTES)
        self._after_handshake = False
        try:
            self._sock.disconnect(self.endpoint)
        except zmq.ZMQError:
            pass
        self._connect()
