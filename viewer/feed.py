"""The viewer's side of the wire (README "Wire format"): decoding with limits, and a subscriber thread.

`decode_parts` turns one 3-part ZeroMQ message into a decoded message, a plain dict:

    {"topic": str, "sensor_id": str, "kind": str, "header": dict, "data": ndarray | None,
     "received_s": float (time.monotonic() at receipt)}

with `data` the payload as a read-only numpy array: POINT_DTYPE records for `points`, float32
[range, doppler] dB for `rdmap`, the front end's records (wire.FRONTEND_RECORD_DTYPE, one per receive
channel) for `frontend`, None for `sensor` and `health`. The decoding and every rule are the
wire module's (cubecast.daemon.wire, the contract the daemon and the workers use too), with this
viewer's payload bound; anything that breaks the contract raises its WireError, whose `reason` is one
of the wire's rejection reasons.

`Feed` runs a SUB socket on a thread of its own and keeps, per sensor, only the latest message of each
kind in a lock-protected slot: the GUI takes a `FeedSnapshot` whenever it likes and never waits.
ZeroMQ reconnects by itself when the daemon restarts; the snapshot says how long ago the last message
came and whether the TCP connection is up, so the GUI can show a stall (a tracker written in Python uses
cubecast.daemon.pointstream.PointStream instead: every cloud in order, with gap and drop counts).
`Feed(endpoint, keys=load_feed_keys(...))` for a daemon that requires keys (viewer/keyfiles.py).

An oversized or malformed message costs only itself: every part up to MAX_PART_BYTES (the wire's
generic payload bound) is received without a copy and measured by the decoder (reason 'oversized'
above PAYLOAD_MAX_BYTES); only a larger part, or a broken byte stream, makes ZeroMQ drop the
connection for good, and then the feed dials again after REDIAL_CHECK_S (counted in
`protocol_errors`; a refused security handshake in `handshakes_failed`, redialled the same way). The
same rule as the daemon's subscriber (daemon/netio.py), written again here because the viewer
imports nothing of the daemon but the wire.

Of the daemon this module imports the wire module only (which imports neither the chain nor the
service); besides that it depends on pyzmq and numpy.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field

from ..daemon import wire
from ..daemon.wire import WireError
from .keyfiles import FeedKeys

KINDS = wire.KINDS
VIEW_KINDS = ("points", "rdmap", "sensor", "health", "frontend")

HEADER_MAX_BYTES = wire.MAX_HEADER_BYTES
SENSOR_HEADER_MAX_BYTES = wire.MAX_SENSOR_HEADER_BYTES
MAX_POINTS = 65536                       # about 5 MiB of records: far beyond any one cloud the chain sends
PAYLOAD_MAX_BYTES = MAX_POINTS * wire.RECORD_DTYPE.itemsize  # larger payloads are rejected as 'oversized'
MAX_PART_BYTES = wire.DEFAULT_MAX_PAYLOAD_BYTES  # the socket's per-part limit (ZMQ_MAXMSGSIZE)
REDIAL_CHECK_S = 0.5   # a connection lost and not redialled by ZeroMQ within this is dialled again
REDIAL_MAX_S = 4.0

# the points record layout, exactly as README "Wire format" lists it: [name, unit, dtype]
POINT_FIELDS: tuple[tuple[str, str, str], ...] = wire.POINT_WIRE_FIELDS
POINT_DTYPE = wire.RECORD_DTYPE

__all__ = ["Feed", "FeedSnapshot", "WireError", "decode_parts", "subscription_prefix", "POINT_FIELDS",
           "POINT_DTYPE", "HEADER_MAX_BYTES", "PAYLOAD_MAX_BYTES"]


def decode_parts(parts, received_s: float | None = None) -> dict:
    """Decode and validate one wire message (a sequence of 3 parts); raises WireError."""
    msg = wire.decode(parts, max_payload_bytes=PAYLOAD_MAX_BYTES)
    return {"topic": msg.topic, "sensor_id": msg.sensor_id, "kind": msg.kind, "header": msg.header,
            "data": msg.data, "received_s": time.monotonic() if received_s is None else received_s}


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
    protocol_errors: int = 0      # connections ZeroMQ dropped (a part over MAX_PART_BYTES), dialled again
    handshakes_failed: int = 0    # security handshakes refused or failed (keys)

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

    def __init__(self, endpoint: str | list[str], sensor: str | None = None, poll_ms: int = 50, context=None,
                 keys: FeedKeys | None = None):
        """endpoint: one PUB endpoint, or a list (one SUB socket connects to all of them: several
        daemons, one per sensor, share one picture). keys: the daemon's public key and this side's
        key pair (keyfiles.load_feed_keys), for a daemon that requires keys (the same for every
        endpoint)."""
        self.endpoints = [endpoint] if isinstance(endpoint, str) else list(endpoint)
        if not self.endpoints:
            raise ValueError("no endpoint to subscribe to")
        self.endpoint = " + ".join(self.endpoints)
        self.keys = keys
        self._lost_at: float | None = None   # our connection lost and not redialled by ZeroMQ (since)
        self._redials = 0
        self._handshake_failed = False
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
                reconnects=s.reconnects, protocol_errors=s.protocol_errors,
                handshakes_failed=s.handshakes_failed)

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
            sock.setsockopt(zmq.MAXMSGSIZE, MAX_PART_BYTES)
            sock.setsockopt(zmq.RECONNECT_IVL, 200)
            sock.setsockopt(zmq.RECONNECT_IVL_MAX, 2000)
            sock.setsockopt(zmq.SUBSCRIBE, self.prefix.encode("utf-8"))
            monitor = sock.get_monitor_socket(
                zmq.EVENT_CONNECTED | zmq.EVENT_DISCONNECTED | zmq.EVENT_CONNECT_DELAYED | zmq.EVENT_CONNECT_RETRIED
                | zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
                | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL | zmq.EVENT_HANDSHAKE_FAILED_AUTH)
            if self.keys is not None:
                self.keys.apply(sock)
            for ep in self.endpoints:
                sock.connect(ep)
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
                self._redial(sock)
                if sock in ready:
                    for _ in range(1000):  # drain what is queued; only the latest of each kind stays
                        try:
                            parts = sock.recv_multipart(zmq.NOBLOCK, copy=False)
                        except zmq.Again:
                            break
                        self.ingest(parts)
                        del parts  # an oversized part is freed now
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
        failed = (zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                  | zmq.EVENT_HANDSHAKE_FAILED_AUTH)
        with self._lock:
            if event == zmq.EVENT_CONNECTED:
                if not self._snap.connected and self._snap.received:
                    self._snap.reconnects += 1
                self._snap.connected = True
            elif event == zmq.EVENT_DISCONNECTED:
                self._snap.connected = False
            elif event & failed:
                self._snap.handshakes_failed += 1
                self._snap.last_error = "the daemon refused this viewer's key, or the keys do not match"
                self._handshake_failed = True
        if event == zmq.EVENT_DISCONNECTED:
            self._lost_at = time.monotonic()
        elif event in (zmq.EVENT_CONNECT_DELAYED, zmq.EVENT_CONNECT_RETRIED, zmq.EVENT_CONNECTED):
            self._lost_at = None  # ZeroMQ redials by itself
        elif event == zmq.EVENT_HANDSHAKE_SUCCEEDED:
            self._redials = 0
            self._handshake_failed = False

    def _redial(self, sock) -> None:
        """A connection ZeroMQ gave up (protocol error, refused handshake): dial again, backing off."""
        if self._lost_at is None or time.monotonic() - self._lost_at < min(REDIAL_MAX_S,
                                                                            REDIAL_CHECK_S * 2 ** self._redials):
            return
        import zmq
        self._lost_at = None
        self._redials += 1
        if not self._handshake_failed:
            with self._lock:
                self._snap.protocol_errors += 1
        self._handshake_failed = False
        for ep in self.endpoints:
            try:
                sock.disconnect(ep)
            except zmq.ZMQError:
                pass
        if self.keys is not None:
            self.keys.apply(sock)
        for ep in self.endpoints:
            sock.connect(ep)

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
                s.last_error = f"{exc.reason}: {exc}"[:200]
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
