"""Frame sources and the recorder: `cubecast replay`, `cubecast simulate --pub`, `cubecast record`.

Sources bind an XPUB socket (a PUB that also reports subscriptions; SUB peers see an ordinary PUB) and
publish `adc` messages (README "Wire format") in the sensor's ADC format with the sensor digest, a random `run` id
chosen at start and a `seq` counting up from 0.

Slow joiners: a PUB socket drops what it sends before a subscriber's connection is up. A source
therefore waits, after binding, until `wait_subscribers` subscriptions have arrived or `wait_s`
seconds have passed (default 1 subscriber, at most 1 s), whichever comes first, and then starts
publishing regardless. Frames sent while nobody listens are simply not seen (no backlog builds up).
On close a source lingers at most 1 s to deliver the frames still queued.

Keys (daemon/keys.py): a source given keys (its secret key and a folder of accepted subscribers'
public keys) takes only those subscribers, over CURVE; refused handshakes are counted
(`handshakes_refused`) and logged. Without keys a source binds only addresses other hosts cannot
reach, unless `insecure` (netio.check_exposure): the raw ADC frames are the stream.

The recorder subscribes through netio.Subscriber: an oversized or malformed message is counted under
its reason and costs nothing else; a dropped connection is dialled again.
"""

from __future__ import annotations

import collections
import logging
import math
import secrets
import sys
import threading
import time
from pathlib import Path

import numpy as np
import zmq

from .capture import CaptureReader, CaptureWriter, CorruptFrameError
from .chain.points import RECORD_DTYPE
from .errors import CubecastError
from .exports import CsvWriter, PointWriter, WRITERS, check_target
from .files import capture_sensor
from .frontendout import FrontendRun
from .intake import AdcValidator
from .logs import RateLimitFilter
from .keys import ClientKeys, ServerKeys, client_keys_per_endpoint
from .netio import (DEFAULT_PUB, DEFAULT_SUB, HandshakeCounter, Subscriber, bind_socket, check_exposure,
                    stop_on_signals)
from .progress import Progress
from .scene import Scene
from .sensor import Sensor
from .wire import ADC_DTYPES, WireError, decode, encode_adc, sensor_from_message

DEFAULT_SOURCE = DEFAULT_SUB  # sources bind where serve connects by default
SOURCE_LINGER_MS = 1000
REJECT_LOG_INTERVAL_S = 5.0
SOURCE_EXPOSES = "the raw ADC frames"
# the recorder: the largest points payload it takes (65536 records, as the viewer), and the ADC frames
# it holds at most until the sensor description is known
RECORD_MAX_POINTS_BYTES = 65536 * RECORD_DTYPE.itemsize
RECORD_PENDING_MAX_BYTES = 256 * 1024 * 1024

log = logging.getLogger(__name__)


def new_run_id() -> str:
    return secrets.token_hex(8)


def publisher_keys(server_key: str | None, client_keys: str | None) -> ServerKeys | None:
    """A source's keys from its command's --server-key FILE (its secret key) and --client-keys DIR."""
    if (server_key is None) != (client_keys is None):
        raise CubecastError("--server-key and --client-keys: give both (this source's secret key and the folder of "
                            "accepted subscribers' public keys) or neither")
    if server_key is None:
        return None
    return ServerKeys(server_key, client_keys, clients="subscriber", key_role="--server-key", dir_role="--client-keys")


class AdcPublisher:
    """The publishing end of a source: an XPUB bound to `endpoint`, one run id, seq counting from 0.
    keys: accept only these subscribers (CURVE); insecure: allow an endpoint other hosts can reach
    without keys (logged)."""

    def __init__(self, sensor: Sensor, endpoint: str = DEFAULT_SOURCE, *, sndhwm: int = 1000,
                 context: zmq.Context | None = None, run_id: str | None = None, keys: ServerKeys | None = None,
                 insecure: bool = False):
        check_exposure(endpoint, "--pub", keyed=keys is not None, insecure=insecure, exposes=SOURCE_EXPOSES)
        self.sensor_id, self.digest = sensor.sensor_id, sensor.digest
        self.keys = keys
        self.counter: HandshakeCounter | None = None
        self._own_ctx = context is None
        self.ctx = context or zmq.Context()
        self.sock = self.ctx.socket(zmq.XPUB)
        self.sock.setsockopt(zmq.LINGER, SOURCE_LINGER_MS)
        self.sock.setsockopt(zmq.SNDHWM, sndhwm)
        self.sock.setsockopt(zmq.XPUB_VERBOSE, 1)
        try:
            if keys is not None:
                keys.start(self.ctx)
                keys.apply(self.sock)
                self.counter = HandshakeCounter(self.sock, f"--pub {endpoint}", "cubecast source")
            self.endpoint = bind_socket(self.sock, endpoint, "--pub")
        except BaseException:
            self.close()
            raise
        self.run_id = run_id or new_run_id()
        self.seq = 0
        self.subscriptions = 0

    @property
    def handshakes_refused(self) -> int:
        """Subscribers refused in the security handshake (unknown key, no key, wrong public key), as
        counted at the last send, wait or close (safe to read from any thread)."""
        return self.counter.refused if self.counter is not None else 0

    def describe(self) -> str:
        return f"{self.endpoint} ({'keys required' if self.keys is not None else 'no keys'})"

    def poll_subscriptions(self) -> int:
        if self.counter is not None:
            self.counter.count()
        while True:
            try:
                event = self.sock.recv(zmq.NOBLOCK)
            except zmq.Again:
                return self.subscriptions
            if event[:1] == b"\x01":
                self.subscriptions += 1

    def wait_for_subscribers(self, count: int, timeout_s: float, stop: threading.Event) -> bool:
        deadline = time.monotonic() + timeout_s
        while self.poll_subscriptions() < count:
            left = deadline - time.monotonic()
            if left <= 0 or stop.is_set():
                return False
            self.sock.poll(min(50, max(1, int(left * 1000))), zmq.POLLIN)
        return True

    def send(self, payload: np.ndarray, timestamp_s: float) -> int:
        """Publish one frame (without a copy: pass a fresh array each time). Returns its seq."""
        seq = self.seq
        self.sock.send_multipart(encode_adc(self.sensor_id, seq, self.run_id, timestamp_s, payload, self.digest),
                                 copy=False)
        self.seq += 1
        self.poll_subscriptions()
        return seq

    def close(self) -> None:
        if self.counter is not None:
            self.counter.count()
            self.counter.close()
        if self.sock is not None:
            self.sock.close()
            self.sock = None
        if self.keys is not None:
            self.keys.stop()
        if self._own_ctx and self.ctx is not None:
            self.ctx.term()
            self.ctx = None


def parse_speed(text: str | float) -> float | None:
    """'max' -> None (as fast as possible); a number > 0 -> that factor of recorded time."""
    if isinstance(text, str) and text.strip().lower() == "max":
        return None
    try:
        value = float(text)
    except (TypeError, ValueError):
        raise CubecastError(f"--speed {text!r}: must be a number > 0 (1 = recorded timing) or 'max'") from None
    if not (value > 0 and math.isfinite(value)):
        raise CubecastError(f"--speed {text!r}: must be a number > 0 (1 = recorded timing) or 'max'")
    return value


class _Pacer:
    """Sleeps until virtual time t (seconds) / speed after the start; re-anchors after a stall of more
    than 0.5 s instead of bursting to catch up."""

    def __init__(self, speed: float | None, stop: threading.Event):
        self.speed, self.stop = speed, stop
        self.t0: float | None = None
        self.v0 = 0.0

    def wait(self, virtual_s: float) -> bool:
        if self.speed is None:
            return not self.stop.is_set()
        now = time.monotonic()
        if self.t0 is None:
            self.t0, self.v0 = now, virtual_s
            return not self.stop.is_set()
        target = self.t0 + (virtual_s - self.v0) / self.speed
        if now - target > 0.5:
            self.t0 += now - target
            target = now
        while True:
            left = target - time.monotonic()
            if left <= 0:
                return not self.stop.is_set()
            if self.stop.wait(min(left, 0.05)):
                return False


class ReplaySource:
    """Replays a capture: ReplaySource(capture, endpoint).run(stop_event) -> frames sent.

    speed: factor of recorded time (None = as fast as possible); loop: start over at the end, with seq
    counting on and timestamps shifted by the capture's span plus one frame interval per pass, so
    both keep increasing; frames: stop after this many frames (0 = at the end, or never with loop)."""

    def __init__(self, capture: str | Path, endpoint: str = DEFAULT_SOURCE, *, speed: float | None = 1.0,
                 loop: bool = False, frames: int = 0, wait_subscribers: int = 1, wait_s: float = 1.0,
                 sndhwm: int = 1000, context: zmq.Context | None = None, keys: ServerKeys | None = None,
                 insecure: bool = False):
        if isinstance(frames, bool) or not isinstance(frames, int) or frames < 0:
            raise CubecastError(f"--frames {frames!r}: must be a whole number >= 0 (0 = all)")
        self.reader = CaptureReader(capture)
        try:
            self.sensor = capture_sensor(self.reader)
            n = len(self.reader)
            if n == 0:
                raise CubecastError(f"{capture}: the capture holds no readable frames")
            dt = self.reader.frame_dtype(0).str
            if dt not in ADC_DTYPES:
                raise CubecastError(f"{capture}: frames are {dt}; the wire carries {', '.join(ADC_DTYPES)} only")
            ts = [self.reader._entry(j)[1].timestamp_s for j in range(n)]
        except BaseException:
            self.reader.close()
            raise
        self.timestamps_s = ts
        interval = (ts[-1] - ts[0]) / (n - 1) if n > 1 else self.sensor.frame_period_s
        self.pass_span_s = (ts[-1] - ts[0]) + (interval if interval > 0 else self.sensor.frame_period_s)
        self.endpoint_requested = endpoint
        self.speed, self.loop, self.frames = speed, loop, frames
        self.wait_subscribers, self.wait_s = wait_subscribers, wait_s
        self.sndhwm, self.context = sndhwm, context
        self.keys, self.insecure = keys, insecure
        self.publisher: AdcPublisher | None = None
        self.frames_sent = 0
        self.handshakes_refused = 0  # subscribers refused in the security handshake (kept after close)
        self.corrupt_skipped: set[int] = set()

    def bind(self) -> str:
        if self.publisher is None:
            self.publisher = AdcPublisher(self.sensor, self.endpoint_requested, sndhwm=self.sndhwm,
                                          context=self.context, keys=self.keys, insecure=self.insecure)
        return self.publisher.endpoint

    @property
    def endpoint(self) -> str | None:
        return self.publisher.endpoint if self.publisher else None

    def run(self, stop: threading.Event | None = None) -> int:
        stop = stop or threading.Event()
        self.bind()
        pub = self.publisher
        try:
            if self.wait_subscribers > 0 and self.wait_s > 0:
                pub.wait_for_subscribers(self.wait_subscribers, self.wait_s, stop)
            log.info("cubecast replay: publishing %s (sensor '%s', %d frames, run %s) on %s", self.reader.path,
                     self.sensor.sensor_id, len(self.reader), pub.run_id, pub.describe())
            pacer = _Pacer(self.speed, stop)
            n = len(self.reader)
            k = 0
            while not stop.is_set():
                j, lap = k % n, k // n
                if lap and not self.loop:
                    break
                if self.frames and self.frames_sent >= self.frames:
                    break
                k += 1
                virtual = self.timestamps_s[j] + lap * self.pass_span_s
                if not pacer.wait(virtual):
                    break
                try:
                    frame = self.reader.read(j)  # a fresh array: safe to hand to ZeroMQ without a copy
                except CorruptFrameError as exc:
                    if j not in self.corrupt_skipped:
                        self.corrupt_skipped.add(j)
                        log.warning("cubecast replay: warning: skipping frame: %s", exc)
                    if len(self.corrupt_skipped) == n:
                        raise CubecastError(f"{self.reader.path}: every frame is corrupt") from None
                    continue
                pub.send(frame.payload, virtual)
                self.frames_sent += 1
        finally:
            self.close()
        return self.frames_sent

    def close(self) -> None:
        if self.publisher is not None:
            self.publisher.close()
            self.handshakes_refused = self.publisher.handshakes_refused
            self.publisher = None
        self.reader.close()


def replay(capture: str, endpoint: str = DEFAULT_SOURCE, speed: str = "1", loop: bool = False, frames: int = 0,
           wait_s: float = 1.0, server_key: str | None = None, client_keys: str | None = None,
           insecure: bool = False) -> int:
    """`cubecast replay`: until the end (or --frames, or forever with --loop), SIGINT or SIGTERM."""
    keys = publisher_keys(server_key, client_keys)
    stop = threading.Event()
    with stop_on_signals(stop):
        src = ReplaySource(capture, endpoint, speed=parse_speed(speed), loop=loop, frames=frames, wait_s=wait_s,
                           keys=keys, insecure=insecure)
        sent = src.run(stop)
    log.info("cubecast replay: sent %d frames%s", sent,
             f"; refused {src.handshakes_refused} subscriber handshakes" if keys else "")
    return 0


def publish_simulation(sensor: Sensor, scene: Scene, endpoint: str, frames: int = 0, seed: int = 0, *,
                       wait_s: float = 1.0, stop: threading.Event | None = None,
                       context: zmq.Context | None = None, keys: ServerKeys | None = None,
                       insecure: bool = False) -> int:
    """`cubecast simulate SCENE --sensor S --pub ENDPOINT`: simulated frames (ADC format, scene time
    as timestamp_s) published live at the frame period; frames = 0 runs until stopped."""
    from .simulate import Simulator
    if isinstance(frames, bool) or not isinstance(frames, int) or frames < 0:
        raise CubecastError(f"--frames-live {frames!r}: must be a whole number >= 0 (0 = until stopped)")
    own_stop = stop is None
    stop = stop or threading.Event()
    sim = Simulator(sensor, scene, seed=seed)
    with (stop_on_signals(stop) if own_stop else _nullcontext()):
        pub = AdcPublisher(sensor, endpoint, context=context, keys=keys, insecure=insecure)
        try:
            pub.wait_for_subscribers(1, wait_s, stop)
            log.info("cubecast simulate: publishing '%s' as sensor '%s' on %s (run %s, frame period %g ms)",
                     scene.name, sensor.sensor_id, pub.describe(), pub.run_id, sensor.frame_period_s * 1e3)
            pacer = _Pacer(1.0, stop)
            late_warned = False
            i = 0
            while not stop.is_set() and (frames == 0 or i < frames):
                t_make = time.monotonic()
                payload = sim.raw_frame(i)
                if not late_warned and i > 0 and time.monotonic() - t_make > sensor.frame_period_s:
                    late_warned = True
                    log.warning("cubecast simulate: warning: making a frame takes longer than the frame period "
                                "%g ms; frames go out late", sensor.frame_period_s * 1e3)
                if not pacer.wait(sim.frame_time_s(i)):
                    break
                pub.send(payload, sim.frame_time_s(i))
                i += 1
        finally:
            pub.close()
            refused = pub.handshakes_refused
    log.info("cubecast simulate: sent %d frames%s", i, f"; refused {refused} subscriber handshakes" if keys else "")
    return 0


class _nullcontext:
    def __enter__(self):
        return None

    def __exit__(self, *exc):
        return False


# ---- recorder ---------------------------------------------------------------------------------

class PointsCsvWriter(CsvWriter):
    """exports.CsvWriter opened at once, taking records only: the format of files.write_points_csv."""

    def __init__(self, path: str | Path):
        super().__init__(path, "--points-out")
        self.open()

    def write(self, records: np.ndarray) -> None:
        self.write_frame(0, 0.0, records, "")  # CSV rows carry their own frame and timestamp


class Recorder:
    """Records ADC frames to a capture and/or point clouds to a point file (exports.py; `points_format`,
    else the one its name says) from one or more endpoints. Every points message is one cloud, also one
    without points (frame = its seq, stamp = its timestamp_s, frame id = its sensor id); the point file
    is renamed into place when the recorder stops.

    ADC frames come from a source's endpoint, points and the sensor description from the daemon's;
    give both to get both. The sensor description is `sensor` (from --sensor) or the first `sensor`
    message; ADC frames arriving before it are held (at most 256 frames and RECORD_PENDING_MAX_BYTES)
    and written once it is known. keys: keys.ClientKeys per endpoint of `subs` (same order), or None.
    Payloads larger than the sensor's frame (ADC) or RECORD_MAX_POINTS_BYTES (points, maps) are
    ignored as 'oversized'; dropped connections are dialled again (netio.Subscriber)."""

    def __init__(self, subs: list[str], out: str | Path | None = None, points_out: str | Path | None = None, *,
                 points_format: str | None = None, frames: int = 0, duration_s: float = 0.0,
                 sensor: Sensor | None = None,
                 context: zmq.Context | None = None, keys: list[ClientKeys] | None = None,
                 max_part_bytes: int | None = None, progress: bool | None = None,
                 frontend_out: str | Path | None = None):
        """frontend_out: a CSV of the `frontend` messages received (frontendout.py), a row per frame and
        receive channel; the run's front-end summary is in `frontend` either way."""
        if not subs:
            raise CubecastError("record: give at least one --sub ENDPOINT")
        if out is None and points_out is None and frontend_out is None:
            raise CubecastError("record: give --out CAPTURE, --points-out FILE and/or --frontend-out FILE.csv")
        if isinstance(frames, bool) or not isinstance(frames, int) or frames < 0:
            raise CubecastError(f"--frames {frames!r}: must be a whole number >= 0 (0 = no limit)")
        if not (duration_s >= 0 and math.isfinite(duration_s)):
            raise CubecastError(f"--duration {duration_s!r}: must be a number of seconds >= 0 (0 = no limit)")
        self.subs, self.out, self.points_out = list(subs), out, points_out
        self.points_format = None if points_out is None else check_target("--points-out", points_out, points_format)
        if keys is not None and len(keys) != len(self.subs):
            raise CubecastError(f"record: {len(keys)} keys for {len(self.subs)} endpoints; one per endpoint")
        self.keys, self.max_part_bytes = keys, max_part_bytes
        self.progress = progress  # None: no progress; False: a log line a second; True: a tqdm bar
        self.subscriber: Subscriber | None = None
        self.frames, self.duration_s = frames, duration_s
        self.sensor = sensor
        self.context = context
        self.sensor_known = threading.Event()
        self.connected = threading.Event()
        # ignored messages: at most one line per reason per interval (the filter sits on this
        # Recorder's own logger while it runs)
        self._reject_logger = logging.getLogger(f"{__name__}.record")
        self._reject_limit = RateLimitFilter(REJECT_LOG_INTERVAL_S)
        self.writer: CaptureWriter | None = None
        self.points_writer: PointWriter | None = None  # the point file's writer (any format)
        self.validator: AdcValidator | None = None
        self.pending: collections.deque = collections.deque(maxlen=256)
        self.pending_bytes = 0
        self.pending_lost = 0
        self.frames_written = 0
        self.clouds_written = 0
        self.rejected: collections.Counter = collections.Counter()
        self.frontend_out = frontend_out
        self.frontend: FrontendRun | None = None  # from the first `frontend` message on
        self.runs: list[str] = []
        self._last_frame: tuple[str, int] | None = None

    def _reject_log(self, reason: str, text: str) -> None:
        self._reject_logger.warning("cubecast record: ignored message, %s: %s", reason, text,
                                    extra={"reason": reason})

    def _flush_rejects(self, force: bool = False) -> None:
        self._reject_limit.flush(self._reject_logger, force=force, prefix="cubecast record: ignored message, ")

    def _set_sensor(self, sensor: Sensor) -> None:
        self.sensor = sensor
        self.validator = AdcValidator(sensor)
        if self.out is not None and self.writer is None:
            meta = {"source": "recorded", "sub": self.subs,
                    "timestamp_origin": "the source's timestamp_s (replay: the replayed capture's; live: its clock)"}
            self.writer = CaptureWriter(self.out, sensor.source_text, None, meta)
        self.sensor_known.set()
        pending, self.pending = list(self.pending), collections.deque(maxlen=256)
        self.pending_bytes = 0
        for msg in pending:
            self._on_adc(msg)

    def _on_adc(self, msg) -> None:
        if self.out is None or self._limit_reached():
            return
        if self.sensor is None:
            while self.pending and (len(self.pending) == self.pending.maxlen
                                    or self.pending_bytes + msg.payload.nbytes > RECORD_PENDING_MAX_BYTES):
                self.pending_bytes -= self.pending.popleft().payload.nbytes
                self.pending_lost += 1
            if msg.payload.nbytes > RECORD_PENDING_MAX_BYTES:
                self.pending_lost += 1
                return
            self.pending.append(msg)
            self.pending_bytes += msg.payload.nbytes
            return
        try:
            self.validator.check(msg)
        except WireError as exc:
            self.rejected[exc.reason] += 1
            self._reject_log(exc.reason, str(exc))
            return
        if not self.runs or self.runs[-1] != msg.header["run"]:
            self.runs.append(msg.header["run"])
        self.writer.write(msg.data, msg.header["seq"], msg.header["timestamp_s"])
        self.frames_written += 1
        self._last_frame = (msg.header["run"], msg.header["seq"])

    def _limit_reached(self) -> bool:
        """--frames counts what is recorded: ADC frames with --out, else point clouds with --points-out,
        else the frames of front-end monitor records (--frontend-out alone)."""
        if not self.frames:
            return False
        if self.out is not None:
            return self.frames_written >= self.frames
        if self.points_out is not None:
            return self.clouds_written >= self.frames
        return self.frontend is not None and self.frontend.summary.frames >= self.frames

    def _payload_bound(self, parts) -> int:
        """The largest payload taken for this message: the sensor's frame for ADC frames (once known), the
        points bound for everything else."""
        if len(parts) != 3:
            return RECORD_MAX_POINTS_BYTES  # the decoder refuses it
        topic = parts[0].bytes if isinstance(parts[0], zmq.Frame) else bytes(parts[0])
        if topic.endswith(b"/adc"):
            return self.validator.max_payload_bytes if self.validator is not None else RECORD_PENDING_MAX_BYTES
        return RECORD_MAX_POINTS_BYTES

    def _on_message(self, parts) -> bool:
        """Handle one message; True once the points of the last recorded frame have arrived."""
        try:
            msg = decode(parts, max_payload_bytes=self._payload_bound(parts))
        except WireError as exc:
            self.rejected[exc.reason] += 1
            self._reject_log(exc.reason, str(exc))
            return False
        if self.sensor is not None and msg.sensor_id != self.sensor.sensor_id:
            self.rejected["unknown_sensor"] += 1
            return False
        if msg.kind == "sensor":
            try:
                sensor = sensor_from_message(msg)
            except WireError as exc:
                self.rejected[exc.reason] += 1
                self._reject_log(exc.reason, str(exc))
                return False
            if self.sensor is None:
                self._set_sensor(sensor)
            elif sensor.digest != self.sensor.digest:
                self.rejected["digest"] += 1
                self._reject_log("digest", f"the daemon describes '{sensor.sensor_id}' with digest {sensor.digest}, "
                                           f"the recorder uses {self.sensor.digest}")
            self.sensor_known.set()
        elif msg.kind == "adc":
            self._on_adc(msg)
        elif msg.kind == "frontend":
            if self.out is None and self.points_out is None and self._limit_reached():
                return False
            if self.frontend is None:
                self.frontend = FrontendRun(len(msg.data), msg.header["full_scale"], self.frontend_out)
            if len(msg.data) == self.frontend.summary.n_rx:
                self.frontend.add(msg.header["seq"], msg.header["timestamp_s"], msg.data)
            else:
                self.rejected["shape"] += 1
                self._reject_log("shape", f"a frontend message of {len(msg.data)} receive channels after one of "
                                          f"{self.frontend.summary.n_rx}")
        elif msg.kind == "points" and self.points_writer is not None:
            if self.out is None and self._limit_reached():
                return False
            self.points_writer.write_frame(msg.header["seq"], msg.header["timestamp_s"], msg.data, msg.sensor_id)
            self.clouds_written += 1
            return self._last_frame == (msg.header["run"], msg.header["seq"])
        return False

    def run(self, stop: threading.Event | None = None) -> dict:
        stop = stop or threading.Event()
        ctx = self.context or zmq.Context()
        sock = shown = None
        self._reject_logger.addFilter(self._reject_limit)
        try:
            if self.points_out is not None:
                self.points_writer = WRITERS[self.points_format](self.points_out, "--points-out").open()
            if self.sensor is not None:
                self._set_sensor(self.sensor)
            extra = {} if self.max_part_bytes is None else {"max_part_bytes": self.max_part_bytes}
            sock = self.subscriber = Subscriber(ctx, self.subs, "--sub", rcvhwm=64, prefix="cubecast record",
                                                keys=self.keys, **extra)
            self.connected.set()
            shown = self._progress()
            t_end = time.monotonic() + self.duration_s if self.duration_s else math.inf
            grace_end = math.inf
            done = False
            while not stop.is_set() and not done:
                now = time.monotonic()
                if now >= t_end or now >= grace_end:
                    break
                if self._limit_reached() and grace_end == math.inf:
                    # the frame limit is reached; wait briefly for the points of the last frame
                    if self.points_writer is None or self.out is None or self._last_frame is None:
                        break
                    grace_end = now + 1.0
                if sock.poll(50):
                    for _ in range(1000):
                        parts = sock.recv()
                        if parts is None:
                            break
                        if self._on_message(parts) and self._limit_reached():
                            done = True
                            break
                        del parts
                self._flush_rejects()
                sock.flush_log()
                if shown is not None:
                    shown.update(**self._counts())
        finally:
            if shown is not None:
                shown.close()
            if sock is not None:
                sock.close()
            if self.context is None:
                ctx.term()
            if self.writer is not None:
                self.writer.close()
            try:
                if self.points_writer is not None:
                    self.points_writer.close()  # the point file under its final name
                if self.frontend is not None:
                    self.frontend.close()
            finally:
                self._flush_rejects(force=True)
                self._reject_logger.removeFilter(self._reject_limit)
        if self.out is not None and self.sensor is None:
            raise CubecastError(f"record: no sensor description received ({len(self.pending)} ADC frames held, "
                                f"nothing written to {self.out}): also subscribe to the daemon's endpoint "
                                "(it publishes the description) or pass --sensor")
        return self.summary()

    def _counts(self) -> dict[str, int]:
        """What has been written so far, by the names of the progress line."""
        counts = {"frames": self.frames_written} if self.out is not None else {}
        if self.points_out is not None:
            points = self.points_writer.points if self.points_writer else 0
            counts |= {"point clouds": self.clouds_written, "points": points}
        if not counts:  # --frontend-out alone
            counts = {"monitor frames": self.frontend.summary.frames if self.frontend is not None else 0}
        return counts

    def _progress(self) -> Progress | None:
        if self.progress is None:
            return None
        return Progress("cubecast record", tuple(self._counts()), logger=log, bar=self.progress,
                        total=self.frames or None)

    def summary(self) -> dict:
        sub = self.subscriber
        return {"frames_written": self.frames_written, "clouds_written": self.clouds_written,
                "points_written": self.points_writer.points if self.points_writer else 0, "runs": list(self.runs),
                "rejected": dict(self.rejected), "pending_lost": self.pending_lost,
                "sequence_gaps": self.validator.sequence_gaps if self.validator else 0,
                "protocol_errors": sub.protocol_errors if sub else 0,
                "handshakes_failed": sub.handshakes_failed if sub else 0}


def record(subs: list[str], out: str | None, points_out: str | None = None, points_format: str | None = None,
           frames: int = 0, duration_s: float = 0.0, sensor_path: str | None = None,
           server_keys: list[str] | None = None, key: str | None = None, progress: bool = False,
           frontend_out: str | None = None) -> int:
    """`cubecast record`: until --frames / --duration, SIGINT or SIGTERM. server_keys: the public keys
    of the endpoints (one for all, or one per --sub); key: this recorder's secret key. Progress (frames
    and points written, and their rates) goes to standard error once a second as a log line, or, with
    `progress` (a person watches), as a tqdm bar when standard error is a terminal."""
    sensor = None
    if sensor_path is not None:
        from .sensor import load_sensor
        sensor = load_sensor(sensor_path)
    subs = subs or [DEFAULT_PUB]
    keys = client_keys_per_endpoint(subs, server_keys, key, server_role="--server-key", key_role="--key",
                                    endpoint_role="--sub")
    stop = threading.Event()
    with stop_on_signals(stop):
        rec = Recorder(subs, out, points_out, points_format=points_format, frames=frames, duration_s=duration_s,
                       sensor=sensor, keys=keys,
                       progress=bool(progress and sys.stderr.isatty()), frontend_out=frontend_out)
        s = rec.run(stop)
    parts = []
    if out is not None:
        parts.append(f"{s['frames_written']} frames ({len(s['runs'])} source run(s), {s['sequence_gaps']} "
                     f"missing by sequence) -> {out}")
    if points_out is not None:
        parts.append(f"{s['clouds_written']} point clouds, {s['points_written']} points -> {points_out}")
    if s["rejected"]:
        parts.append("ignored: " + ", ".join(f"{k} {v}" for k, v in sorted(s["rejected"].items())))
    for name in ("protocol_errors", "handshakes_failed"):
        if s[name]:
            parts.append(f"{name.replace('_', ' ')} {s[name]}")
    log.info("cubecast record: %s", "; ".join(parts))
    if rec.frontend is not None:
        rec.frontend.log_summary(log, "cubecast record: ")
    elif frontend_out is not None:
        log.warning("cubecast record: no front-end monitor received, nothing written to %s (subscribe to serve's "
                    "endpoint)", frontend_out)
    return 0
