"""The viewer's side of the wire (wire.md, version 1): decoding with limits, and a subscriber thread.

`decode_parts` turns one 3-part ZeroMQ message into a decoded message, a plain dict:

    {"topic": str, "sensor_id": str, "kind": str, "header": dict, "data": ndarray | None,
     "received_s": float (time.monotonic() at receipt)}

with `data` the payload as a read-only numpy array: POINT_DTYPE records for `points`, float32
[range, doppler] dB for `rdmap`, None for `sensor` and `health`. Anything that breaks the contract
raises WireError with one of the wire's rejection reasons (`malformed`, `wire_version`, `oversized`).

`Feed` runs a SUB socket on a thread of its own and keeps, per sensor, only the latest message of each
kind in a lock-protected slot: the GUI takes a `FeedSnapshot` whenever it likes and never waits.
ZeroMQ reconnects by itself when the daemon restarts; the snapshot says how long ago the last message
came and whether the TCP connection is up, so the GUI can show a stall.

This module depends on pyzmq, msgpack and numpy only; it never imports the daemon.
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass, field

import msgpack
import numpy as np

WIRE_VERSION = 1
KINDS = ("adc", "points", "rdmap", "sensor", "health")
VIEW_KINDS = ("points", "rdmap", "sensor", "health")

HEADER_MAX_BYTES = 64 * 1024
SENSOR_HEADER_MAX_BYTES = 1024 * 1024
TOPIC_MAX_BYTES = 256
MAX_ARRAY_LEN = 4096
MAX_MAP_LEN = 256
MAX_POINTS = 65536                       # 4 MiB of records: far beyond any one cloud the chain sends
MAX_RDMAP_AXIS = 1024                    # the daemon sends at most 128 x 64; allow slack, stay bounded
PAYLOAD_MAX_BYTES = MAX_POINTS * 64      # also the socket's per-part limit (ZMQ_MAXMSGSIZE)

# the points record layout, exactly as wire.md lists it: [name, unit, dtype]
POINT_FIELDS: tuple[tuple[str, str, str], ...] = (
    ("frame", "", "<u8"), ("timestamp_s", "s", "<f8"),
    ("x_m", "m", "<f4"), ("y_m", "m", "<f4"), ("z_m", "m", "<f4"),
    ("range_m", "m", "<f4"), ("azimuth_deg", "deg", "<f4"), ("elevation_deg", "deg", "<f4"),
    ("velocity_mps", "m/s", "<f4"), ("snr_db", "dB", "<f4"),
    ("sigma_range_m", "m", "<f4"), ("sigma_azimuth_deg", "deg", "<f4"),
    ("sigma_elevation_deg", "deg", "<f4"), ("sigma_velocity_mps", "m/s", "<f4"),
)
POINT_DTYPE = np.dtype([(n, d) for n, _, d in POINT_FIELDS])
assert POINT_DTYPE.itemsize == 64

SUMMARY_KEYS = ("max_range_m", "max_velocity_mps", "fov_half_azimuth_deg", "fov_half_elevation_deg",
                "range_resolution_m", "velocity_resolution_mps")
HEALTH_INT_KEYS = ("frames_received", "frames_processed", "frames_dropped", "frames_rejected",
                   "sequence_gaps", "source_restarts", "queue_depth", "points_last")
HEALTH_NUM_KEYS = ("uptime_s", "latency_p50_ms", "latency_p99_ms", "cpu_share", "fps")


class WireError(ValueError):
    """A message that breaks the wire contract; `reason` is the wire's rejection reason."""

    def __init__(self, reason: str, detail: str):
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


# ---- field validation ---------------------------------------------------------------------------

def _get(h: dict, key: str):
    if key not in h:
        raise WireError("malformed", f"header field '{key}' is missing")
    return h[key]


def _int(h: dict, key: str, lo: int = 0, hi: int = 2 ** 63) -> int:
    v = _get(h, key)
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        raise WireError("malformed", f"header field '{key}' = {v!r}: must be an integer in [{lo}, {hi}]")
    return v


def _num(h: dict, key: str, positive: bool = False, nonnegative: bool = False) -> float:
    v = _get(h, key)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise WireError("malformed", f"header field '{key}' = {v!r}: must be a finite number")
    if positive and not v > 0:
        raise WireError("malformed", f"header field '{key}' = {v!r}: must be positive")
    if nonnegative and v < 0:
        raise WireError("malformed", f"header field '{key}' = {v!r}: must not be negative")
    return float(v)


def _str(h: dict, key: str, max_len: int = 256) -> str:
    v = _get(h, key)
    if not isinstance(v, str) or len(v) > max_len:
        raise WireError("malformed", f"header field '{key}': must be a string of at most {max_len} characters")
    return v


def _unpack_header(raw: bytes, limit: int) -> dict:
    if len(raw) > limit:
        raise WireError("oversized", f"header of {len(raw)} bytes exceeds {limit}")
    try:
        h = msgpack.unpackb(raw, raw=False, strict_map_key=True, use_list=True,
                            max_str_len=limit, max_bin_len=limit, max_array_len=MAX_ARRAY_LEN,
                            max_map_len=MAX_MAP_LEN, max_ext_len=0)
    except Exception as exc:  # msgpack raises several types for bad input; all mean the same here
        raise WireError("malformed", f"header is not valid msgpack ({type(exc).__name__})") from None
    if not isinstance(h, dict):
        raise WireError("malformed", "header is not a map")
    return h


def _as_bytes(part) -> bytes | memoryview:
    if isinstance(part, (bytes, bytearray, memoryview)):
        return part
    buf = getattr(part, "buffer", None)  # zmq.Frame
    if buf is not None:
        return buf
    raise WireError("malformed", f"message part of type {type(part).__name__}")


def decode_parts(parts, received_s: float | None = None) -> dict:
    """Decode and validate one wire message (a sequence of 3 parts); raises WireError."""
    if len(parts) != 3:
        raise WireError("malformed", f"{len(parts)} message parts, expected 3")
    topic_b, header_b, payload = (_as_bytes(p) for p in parts)
    if len(topic_b) > TOPIC_MAX_BYTES:
        raise WireError("oversized", f"topic of {len(topic_b)} bytes exceeds {TOPIC_MAX_BYTES}")
    try:
        topic = bytes(topic_b).decode("utf-8")
    except UnicodeDecodeError:
        raise WireError("malformed", "topic is not UTF-8") from None
    sensor_id, sep, kind = topic.rpartition("/")
    if not sep or not sensor_id or kind not in KINDS:
        raise WireError("malformed", f"topic '{topic[:64]}' is not <sensor_id>/<kind>")
    limit = SENSOR_HEADER_MAX_BYTES if kind == "sensor" else HEADER_MAX_BYTES
    h = _unpack_header(bytes(header_b), limit)
    if "wire" not in h:
        raise WireError("malformed", "header field 'wire' is missing")
    if isinstance(h["wire"], bool) or h["wire"] != WIRE_VERSION:
        raise WireError("wire_version", f"wire version {h['wire']!r}, this viewer reads {WIRE_VERSION}")
    if _str(h, "kind") != kind:
        raise WireError("malformed", f"header kind '{h['kind']}' differs from the topic's '{kind}'")
    if _str(h, "sensor_id") != sensor_id:
        raise WireError("malformed", f"header sensor_id '{h['sensor_id']}' differs from the topic's")
    if len(payload) > PAYLOAD_MAX_BYTES:
        raise WireError("oversized", f"payload of {len(payload)} bytes exceeds {PAYLOAD_MAX_BYTES}")

    data = None
    if kind == "points":
        data = _points(h, payload)
    elif kind == "rdmap":
        data = _rdmap(h, payload)
    elif kind == "sensor":
        _sensor(h, payload)
    elif kind == "health":
        _health(h, payload)
    else:  # adc: not for display; the header is checked, the payload is not converted
        _int(h, "seq")
    return {"topic": topic, "sensor_id": sensor_id, "kind": kind, "header": h, "data": data,
            "received_s": time.monotonic() if received_s is None else received_s}


def _points(h: dict, payload) -> np.ndarray:
    _int(h, "seq")
    _str(h, "run")
    _num(h, "timestamp_s")
    _num(h, "latency_s", nonnegative=True)
    count = _int(h, "count", 0, MAX_POINTS)
    fields = _get(h, "fields")
    if not isinstance(fields, list) or len(fields) != len(POINT_FIELDS) or any(
            not isinstance(f, list) or tuple(f) != want for f, want in zip(fields, POINT_FIELDS)):
        raise WireError("malformed", "points 'fields' differ from the wire's record layout")
    if len(payload) != count * POINT_DTYPE.itemsize:
        raise WireError("malformed", f"points payload of {len(payload)} bytes for count {count} "
                                     f"(expected {count * POINT_DTYPE.itemsize})")
    return np.frombuffer(bytes(payload), POINT_DTYPE, count)


def _rdmap(h: dict, payload) -> np.ndarray:
    _int(h, "seq")
    _num(h, "timestamp_s")
    shape = _get(h, "shape")
    if (not isinstance(shape, list) or len(shape) != 2 or any(
            isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= MAX_RDMAP_AXIS for n in shape)):
        raise WireError("malformed", f"rdmap 'shape' = {shape!r}: must be [n_range, n_doppler], each "
                                     f"1..{MAX_RDMAP_AXIS}")
    if _get(h, "dtype") != "<f4":
        raise WireError("malformed", f"rdmap 'dtype' = {h['dtype']!r}: must be '<f4'")
    if _get(h, "unit") != "dB":
        raise WireError("malformed", f"rdmap 'unit' = {h['unit']!r}: must be 'dB'")
    _num(h, "range_start_m")
    _num(h, "range_step_m", positive=True)
    _num(h, "velocity_start_mps")
    _num(h, "velocity_step_mps", positive=True)
    n_r, n_d = shape
    if len(payload) != n_r * n_d * 4:
        raise WireError("malformed", f"rdmap payload of {len(payload)} bytes for shape {shape}")
    return np.frombuffer(bytes(payload), "<f4").reshape(n_r, n_d)


def _sensor(h: dict, payload) -> None:
    digest = _str(h, "digest", 64)
    if len(digest) != 16 or any(c not in "0123456789abcdef" for c in digest):
        raise WireError("malformed", f"sensor 'digest' = {digest!r}: must be 16 hex characters")
    _str(h, "sensor_toml", SENSOR_HEADER_MAX_BYTES)
    s = _get(h, "summary")
    if not isinstance(s, dict):
        raise WireError("malformed", "sensor 'summary' must be a map")
    for key in SUMMARY_KEYS:
        _num(s, key, positive=True)
    if len(payload):
        raise WireError("malformed", "sensor messages carry no payload")


def _health(h: dict, payload) -> None:
    for key in HEALTH_INT_KEYS:
        _int(h, key)
    for key in HEALTH_NUM_KEYS:
        _num(h, key, nonnegative=True)
    rej = _get(h, "rejected")
    if not isinstance(rej, dict) or any(
            not isinstance(k, str) or isinstance(v, bool) or not isinstance(v, int) or v < 0
            for k, v in rej.items()):
        raise WireError("malformed", "health 'rejected' must map reason strings to counts")
    if len(payload):
        raise WireError("malformed", "health messages carry no payload")


# ---- the subscriber thread ----------------------------------------------------------------------

@dataclass
class FeedSnapshot:
    """What the feed holds at one instant; the GUI's copy, safe to read without the lock."""

    endpoint: str
    latest: dict[str, dict[str, dict]] = field(default_factory=dict)   # sensor_id -> kind -> message
    counts: dict[str, dict[str, int]] = field(default_factory=dict)    # sensor_id -> kind -> received
    received: int = 0
    ignored: int = 0              # valid messages the viewer does not show (adc)
    bad: int = 0
    bad_by_reason: dict[str, int] = field(default_factory=dict)
    last_error: str = ""
    last_message_s: float | None = None
    started_s: float = 0.0
    connected: bool = False
    reconnects: int = 0

    def idle_s(self, now_s: float | None = None) -> float:
        """Seconds since the last good message (or since the start when none came yet)."""
        now_s = time.monotonic() if now_s is None else now_s
        ref = self.started_s if self.last_message_s is None else self.last_message_s
        return max(0.0, now_s - ref)


def subscription_prefix(sensor: str | None) -> str:
    """'' for every sensor on the bus, '<id>/' for one."""
    if not sensor:
        return ""
    return sensor if sensor.endswith("/") else sensor + "/"


class Feed:
    """Subscribe to a daemon's PUB endpoint on a background thread; keep the latest of each kind.

    feed = Feed("tcp://127.0.0.1:5602"); feed.start(); ...; snap = feed.snapshot(); ...; feed.stop()
    """

    def __init__(self, endpoint: str, sensor: str | None = None, poll_ms: int = 50, context=None):
        self.endpoint = endpoint
        self.prefix = subscription_prefix(sensor)
        self.poll_ms = poll_ms
        self._ctx = context
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._snap = FeedSnapshot(endpoint=endpoint, started_s=time.monotonic())
        self._error: BaseException | None = None

    # the GUI side: never blocks for longer than a dict copy
    def snapshot(self) -> FeedSnapshot:
        with self._lock:
            s = self._snap
            return FeedSnapshot(
                endpoint=s.endpoint, latest={k: dict(v) for k, v in s.latest.items()},
                counts={k: dict(v) for k, v in s.counts.items()}, received=s.received, ignored=s.ignored,
                bad=s.bad, bad_by_reason=dict(s.bad_by_reason), last_error=s.last_error,
                last_message_s=s.last_message_s, started_s=s.started_s, connected=s.connected,
                reconnects=s.reconnects)

    @property
    def error(self) -> BaseException | None:
        """The exception that ended the thread, if one did (a bad endpoint, for instance)."""
        return self._error

    def start(self) -> "Feed":
        if self._thread is not None:
            return self
        import zmq
        ctx = self._ctx or zmq.Context.instance()
        sock = ctx.socket(zmq.SUB)
        try:
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.RCVHWM, 256)
            sock.setsockopt(zmq.MAXMSGSIZE, max(PAYLOAD_MAX_BYTES, SENSOR_HEADER_MAX_BYTES))
            sock.setsockopt(zmq.RECONNECT_IVL, 200)
            sock.setsockopt(zmq.RECONNECT_IVL_MAX, 2000)
            sock.setsockopt(zmq.SUBSCRIBE, self.prefix.encode("utf-8"))
            monitor = sock.get_monitor_socket(zmq.EVENT_CONNECTED | zmq.EVENT_DISCONNECTED)
            sock.connect(self.endpoint)
        except zmq.ZMQError:
            sock.close(0)
            raise
        self._thread = threading.Thread(target=self._run, args=(sock, monitor), name="cubecast-view-feed",
                                        daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout_s: float = 2.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
            self._thread = None

    def __enter__(self) -> "Feed":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # the thread side
    def _run(self, sock, monitor) -> None:
        import zmq
        from zmq.utils.monitor import recv_monitor_message
        poller = zmq.Poller()
        poller.register(sock, zmq.POLLIN)
        poller.register(monitor, zmq.POLLIN)
        try:
            while not self._stop.is_set():
                ready = dict(poller.poll(self.poll_ms))
                if monitor in ready:
                    while True:
                        try:
                            ev = recv_monitor_message(monitor, zmq.NOBLOCK)
                        except zmq.Again:
                            break
                        self._on_event(ev["event"])
                if sock in ready:
                    for _ in range(1000):  # drain what is queued; only the latest of each kind stays
                        try:
                            parts = sock.recv_multipart(zmq.NOBLOCK, copy=True)
                        except zmq.Again:
                            break
                        self.ingest(parts)
        except BaseException as exc:  # keep the reason for the GUI; the thread must not die silently
            self._error = exc
        finally:
            try:
                sock.disable_monitor()
            except Exception:
                pass
            monitor.close(0)
            sock.close(0)

    def _on_event(self, event: int) -> None:
        import zmq
        with self._lock:
            if event == zmq.EVENT_CONNECTED:
                if not self._snap.connected and self._snap.received:
                    self._snap.reconnects += 1
                self._snap.connected = True
            elif event == zmq.EVENT_DISCONNECTED:
                self._snap.connected = False

    def ingest(self, parts) -> dict | None:
        """Decode one message into the latest-value slots (also usable without the thread)."""
        now = time.monotonic()
        try:
            msg = decode_parts(parts, now)
        except WireError as exc:
            with self._lock:
                s = self._snap
                s.bad += 1
                s.bad_by_reason[exc.reason] = s.bad_by_reason.get(exc.reason, 0) + 1
                s.last_error = str(exc)[:200]
            return None
        with self._lock:
            s = self._snap
            if msg["kind"] not in VIEW_KINDS:
                s.ignored += 1
                return None
            s.latest.setdefault(msg["sensor_id"], {})[msg["kind"]] = msg
            c = s.counts.setdefault(msg["sensor_id"], {})
            c[msg["kind"]] = c.get(msg["kind"], 0) + 1
            s.received += 1
            s.last_message_s = now
        return msg
