"""The streaming daemon: ADC frames in over ZeroMQ, point clouds (and display maps, sensor description,
health) out. `cubecast serve`.

Two threads:

- the receiver thread owns the SUB socket (connected to the source). It decodes and validates every
  message (wire.decode, then intake.AdcValidator: sensor id, digest, dtype, shape, repeated sequence
  numbers), counts rejections by reason, counts sequence gaps and source restarts (a new `run` id),
  and appends good frames to a bounded queue that drops the OLDEST frame when full, so latency stays
  bounded and memory flat when processing falls behind;
- the processing thread (the caller of Service.run) owns the PUB socket (an XPUB, so that a new
  subscriber is noticed and sent the sensor description at once). It hands queued frames to the
  processor and publishes what comes back: the points, a rate-limited max-pooled range-Doppler map,
  the sensor description (on start, on every new subscription and every 2 s) and health once a
  second.

The processor (daemon/processors.py) runs the chain in this process (LocalProcessor: the frame
converted to canonical complex64 into a reused buffer, or the board's format straight into the range
stage) or in worker processes (PoolProcessor, `serve --workers N` or workers on other hosts; see
daemon/pool.py), which hands frames to workers with free capacity and returns their results in
frame order.

Publishing never blocks: a PUB socket drops messages for a subscriber whose queue (SNDHWM) is full, so
a slow subscriber only loses its own messages. Buffers handed to ZeroMQ without a copy are always
fresh arrays (the point records and pooled map are new per frame), never reused buffers.

Counters obey: frames_received == frames_processed + frames_dropped + frames_rejected + queue_depth
+ in_progress + frames_lost_worker + in_flight, read atomically under one lock (the last two are
non-zero only with workers; in_progress only without).

Errors name what is wrong by its role ("queue depth", "publish endpoint"); the CLI owns the flag names.
"""

from __future__ import annotations

import collections
import logging
import math
import threading
import time

import numpy as np
import zmq

from .errors import CubecastError
from .intake import AdcValidator
from .keys import ServerKeys
from .logs import RateLimitFilter, log_limited
from .netio import DEFAULT_PUB, DEFAULT_SUB, bind_socket, connect_socket, stop_on_signals
from .process import load_calibration_for
from .processors import LocalProcessor, Outcome, PoolProcessor
from .sensor import Sensor, load_sensor
from .settings import ProcessingSettings, load_settings
from .wire import REASONS, WireError, decode, encode_health, encode_points, encode_rdmap, encode_sensor

log = logging.getLogger(__name__)

REJECTED = "cubecast serve: rejected frame, "  # the prefix of rejection records
SENSOR_ON_SUBSCRIBE_S = 0.2  # a new subscriber gets the sensor description at most this often


class Service:
    """The daemon loop, usable in-process (Service(...).run(stop_event) in a thread; wait for
    `ready`, then read `pub_endpoint`) and from the CLI.

    sub_endpoint: the source's PUB endpoint(s) to connect to; pub_endpoint: where to bind (tcp://...:*
    or port 0 picks a free port). queue_depth: frames waiting for processing; when full the oldest
    is dropped. Start and stop lines are logged at INFO, rejections and errors at WARNING (at most
    one per reason per log_interval_s)."""

    def __init__(self, sensor: Sensor, sub_endpoint: str | list[str] = DEFAULT_SUB, pub_endpoint: str = DEFAULT_PUB,
                 settings: ProcessingSettings | None = None, calibration: np.ndarray | None = None, *,
                 queue_depth: int = 2, rdmap_max_hz: float = 5.0, sensor_interval_s: float = 2.0,
                 health_interval_s: float = 1.0, log_interval_s: float = 5.0, sndhwm: int = 100,
                 sndbuf_bytes: int = 0, rcvhwm: int = 16, range_bias_m: float = 0.0, workers: int = 0,
                 tasks_endpoint: str | None = None, results_endpoint: str | None = None,
                 task_timeout_s: float | None = None, worker_keys: ServerKeys | None = None):
        """workers: local worker processes to start; tasks_endpoint / results_endpoint: where to bind
        for workers (both or neither; default tcp://127.0.0.1:* when workers > 0). With either, frames
        are processed by workers (daemon/pool.py), else in this process. worker_keys: a
        keys.ServerKeys to require keys of the workers (CURVE)."""
        if isinstance(queue_depth, bool) or not isinstance(queue_depth, int) or queue_depth < 1:
            raise CubecastError(f"queue depth {queue_depth!r}: must be a whole number of at least 1")
        if not (rdmap_max_hz >= 0 and math.isfinite(rdmap_max_hz)):
            raise CubecastError(f"range-Doppler map rate {rdmap_max_hz!r}: must be a finite number of maps per "
                                "second >= 0 (0 = none)")
        if (tasks_endpoint is None) != (results_endpoint is None):
            raise CubecastError("tasks and results endpoints: give both for workers, or neither")
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
            raise CubecastError(f"local workers {workers!r}: must be a whole number >= 0")
        if worker_keys is not None and not (workers > 0 or tasks_endpoint is not None):
            raise CubecastError("worker keys: only with workers (local ones or a tasks endpoint)")
        self.sensor = sensor
        self.settings = (settings or ProcessingSettings()).validate()
        if workers > 0 or tasks_endpoint is not None:
            self.processor = PoolProcessor(
                sensor, self.settings, calibration, range_bias_m, tasks_endpoint or "tcp://127.0.0.1:*",
                results_endpoint or "tcp://127.0.0.1:*", local_workers=workers, task_timeout_s=task_timeout_s,
                keys=worker_keys, log_interval_s=log_interval_s)
        else:
            self.processor = LocalProcessor(sensor, self.settings, calibration, range_bias_m)
        self.sub_endpoints = [sub_endpoint] if isinstance(sub_endpoint, str) else list(sub_endpoint)
        self.pub_endpoint_requested = pub_endpoint
        self.pub_endpoint: str | None = None
        self.queue_depth = queue_depth
        self.rdmap_period_s = 1.0 / rdmap_max_hz if rdmap_max_hz > 0 else math.inf
        self.sensor_interval_s = sensor_interval_s
        self.health_interval_s = health_interval_s
        self.sndhwm, self.sndbuf_bytes, self.rcvhwm = sndhwm, sndbuf_bytes, rcvhwm
        self._reject_log = RateLimitFilter(log_interval_s)
        self._error_log = RateLimitFilter(log_interval_s)
        self.validator = AdcValidator(sensor)
        self.ready = threading.Event()

        self._lock = threading.Lock()
        self._queue: collections.deque = collections.deque()
        self._received = self._processed = self._dropped = self._rejected = 0
        self._busy = 0  # submitted to the processor, not yet published or lost
        self._lost = 0
        self._by_reason = dict.fromkeys(REASONS, 0)
        self._queue_high_water = 0
        self._processing_errors = 0
        self._points_last = 0
        self._latencies_s: collections.deque = collections.deque(maxlen=100_000)
        self._all_latencies_s: collections.deque = collections.deque(maxlen=100_000)
        self._rx_stop = threading.Event()
        self._started = time.monotonic()
        self._last_rdmap = -math.inf
        self.messages_published = collections.Counter()

    # ---- statistics -----------------------------------------------------------------------
    def stats(self) -> dict:
        """A consistent snapshot of the counters (the health fields without the interval figures)."""
        local = self.processor.busy_field == "in_progress"
        with self._lock:
            return {
                "frames_received": self._received, "frames_processed": self._processed,
                "frames_dropped": self._dropped, "frames_rejected": self._rejected,
                "rejected": {k: v for k, v in self._by_reason.items() if v},
                "queue_depth": len(self._queue), "in_progress": self._busy if local else 0,
                "queue_high_water": self._queue_high_water,
                "sequence_gaps": self.validator.sequence_gaps, "source_restarts": self.validator.source_restarts,
                "processing_errors": self._processing_errors, "points_last": self._points_last,
                "frames_lost_worker": self._lost, "in_flight": 0 if local else self._busy,
                **self.processor.counters(),
            }

    def latencies_s(self) -> np.ndarray:
        """Receive-to-publish latency of every published cloud so far (most recent 100 000)."""
        with self._lock:
            return np.array(self._all_latencies_s, np.float64)

    # ---- receiver thread ------------------------------------------------------------------
    def _on_message(self, parts: list, t_recv: float) -> None:
        try:
            msg = decode(parts, max_payload_bytes=self.validator.max_payload_bytes)
            self.validator.check(msg)
        except WireError as exc:
            with self._lock:
                self._received += 1
                self._rejected += 1
                self._by_reason[exc.reason] += 1
            log_limited(log, self._reject_log, logging.WARNING, exc.reason, REJECTED + "%s: %s", exc.reason, exc)
            return
        with self._lock:
            self._received += 1
            if len(self._queue) >= self.queue_depth:
                self._queue.popleft()
                self._dropped += 1
            self._queue.append((msg, t_recv))
            self._queue_high_water = max(self._queue_high_water, len(self._queue))
        self.processor.wake()

    def _receive(self, sub: zmq.Socket) -> None:
        poller = zmq.Poller()
        poller.register(sub, zmq.POLLIN)
        try:
            while not self._rx_stop.is_set():
                if poller.poll(100):
                    for _ in range(1000):  # drain a burst, then look at the stop flag again
                        try:
                            parts = sub.recv_multipart(zmq.NOBLOCK, copy=False)
                        except zmq.Again:
                            break
                        self._on_message(parts, time.perf_counter())
                self._reject_log.flush(log, prefix=REJECTED)
        finally:
            self._reject_log.flush(log, force=True, prefix=REJECTED)
            sub.close(linger=0)

    # ---- processing thread ----------------------------------------------------------------
    def _send(self, pub: zmq.Socket, parts: list, kind: str) -> None:
        try:
            pub.send_multipart(parts, flags=zmq.NOBLOCK, copy=False)
            self.messages_published[kind] += 1
        except zmq.Again:  # a PUB socket drops instead; kept for XPUB_NODROP setups
            self.messages_published["dropped_" + kind] += 1

    def _feed(self, now: float) -> None:
        """Hand queued frames (the oldest first) to the processor while it has capacity; the display
        map is asked for at most every rdmap_period_s."""
        while self.processor.has_capacity():
            with self._lock:
                if not self._queue:
                    return
                msg, t_recv = self._queue.popleft()
                self._busy += 1
            want_map = now - self._last_rdmap >= self.rdmap_period_s
            if self.processor.submit(msg, t_recv, want_map):
                if want_map:
                    self._last_rdmap = now
                continue
            with self._lock:  # nobody could take it after all: back to the head of the queue
                self._busy -= 1
                if len(self._queue) >= self.queue_depth:
                    self._dropped += 1  # it is the oldest frame
                else:
                    self._queue.appendleft((msg, t_recv))
            return

    def _publish(self, pub: zmq.Socket, out: Outcome) -> None:
        if out.lost:
            with self._lock:
                self._busy -= 1
                self._lost += 1
            return
        if out.error is not None:
            with self._lock:
                self._processing_errors += 1
                self._processed += 1
                self._busy -= 1
            log_limited(log, self._error_log, logging.WARNING, "processing error",
                        "cubecast serve: processing error: %s", out.error)
            return
        sid = self.sensor.sensor_id
        latency = time.perf_counter() - out.t_recv
        self._send(pub, encode_points(sid, out.seq, out.run, out.timestamp_s, latency, out.records), "points")
        if out.rdmap is not None:
            self._send(pub, encode_rdmap(sid, out.seq, out.timestamp_s, *out.rdmap()), "rdmap")
        with self._lock:
            self._latencies_s.append(latency)
            self._all_latencies_s.append(latency)
            self._points_last = int(out.records.shape[0])
            self._processed += 1
            self._busy -= 1

    def _health(self, now: float) -> dict:
        interval = max(now - self._last_health, 1e-9)
        cpu = time.process_time()
        with self._lock:
            lat = np.array(self._latencies_s, np.float64)
            self._latencies_s.clear()
            processed = self._processed
        s = self.stats()
        fields = {
            "uptime_s": now - self._started,
            "frames_received": s["frames_received"], "frames_processed": s["frames_processed"],
            "frames_dropped": s["frames_dropped"], "frames_rejected": s["frames_rejected"],
            "rejected": s["rejected"], "sequence_gaps": s["sequence_gaps"],
            "source_restarts": s["source_restarts"],
            "latency_p50_ms": float(np.percentile(lat, 50) * 1e3) if lat.size else None,
            "latency_p99_ms": float(np.percentile(lat, 99) * 1e3) if lat.size else None,
            "queue_depth": s["queue_depth"], "in_progress": s["in_progress"],
            "cpu_share": max(0.0, (cpu - self._last_cpu) / interval),
            "points_last": s["points_last"],
            "fps": (processed - self._last_processed) / interval,
            "processing_errors": s["processing_errors"],
            "stage_ms": {k: float(v) for k, v in self.processor.stage_ms.items()},
            "source_run": self.validator.run,
            "frames_lost_worker": s["frames_lost_worker"], "in_flight": s["in_flight"],
            **{k: s[k] for k in self.processor.health_fields},
        }
        self._last_health, self._last_cpu, self._last_processed = now, cpu, processed
        return fields

    def _bind_pub(self, ctx: zmq.Context) -> zmq.Socket:
        pub = ctx.socket(zmq.XPUB)
        try:
            pub.setsockopt(zmq.LINGER, 0)
            pub.setsockopt(zmq.SNDHWM, self.sndhwm)
            pub.setsockopt(zmq.XPUB_VERBOSE, 1)  # report every subscriber, not only new topics
            if self.sndbuf_bytes:
                pub.setsockopt(zmq.SNDBUF, self.sndbuf_bytes)
            self.pub_endpoint = bind_socket(pub, self.pub_endpoint_requested, "publish endpoint")
        except BaseException:
            pub.close(linger=0)
            raise
        return pub

    def _start_receiver(self, ctx: zmq.Context) -> threading.Thread:
        sub = ctx.socket(zmq.SUB)
        try:
            sub.setsockopt(zmq.LINGER, 0)
            sub.setsockopt(zmq.RCVHWM, self.rcvhwm)
            # ZeroMQ disconnects a peer whose message part exceeds this (a memory guard); below it, an
            # oversized frame is received and rejected with reason 'oversized'.
            sub.setsockopt(zmq.MAXMSGSIZE, 4 * self.validator.max_payload_bytes + (2 << 20))
            sub.setsockopt(zmq.SUBSCRIBE, b"")
            for ep in self.sub_endpoints:
                connect_socket(sub, ep, "source endpoint")
        except BaseException:
            sub.close(linger=0)
            raise
        rx = threading.Thread(target=self._receive, args=(sub,), name="cubecast-serve-rx", daemon=True)
        rx.start()  # the receiver thread owns the socket now and closes it
        return rx

    def _loop(self, pub: zmq.Socket, stop: threading.Event) -> None:
        """Until `stop`: the sensor description (periodically and to new subscribers), health, and
        frames through the processor."""
        now = time.monotonic()
        self._started = self._last_health = now
        self._last_cpu = time.process_time()
        self._last_processed = 0
        self._last_rdmap = -math.inf
        next_sensor, next_health = now, now + self.health_interval_s
        last_sensor = -math.inf
        self.ready.set()
        log.info("cubecast serve: ready: sensor '%s' (digest %s), sub %s, pub %s, queue %d%s", self.sensor.sensor_id,
                 self.sensor.digest, ", ".join(self.sub_endpoints), self.pub_endpoint, self.queue_depth,
                 self.processor.describe())
        while not stop.is_set():
            while True:  # new subscribers: send them the sensor description now (rate-limited)
                try:
                    event = pub.recv(zmq.NOBLOCK)
                except zmq.Again:
                    break
                if event[:1] == b"\x01":
                    next_sensor = min(next_sensor, max(last_sensor + SENSOR_ON_SUBSCRIBE_S, time.monotonic()))
            now = time.monotonic()
            if now >= next_sensor:
                self._send(pub, encode_sensor(self.sensor, self.settings.velocity_unfolding), "sensor")
                last_sensor = now
                next_sensor = now + self.sensor_interval_s
            if now >= next_health:
                self._send(pub, encode_health(self.sensor.sensor_id, self._health(now)), "health")
                self._error_log.flush(log, prefix="cubecast serve: ")
                next_health = max(next_health + self.health_interval_s, now)
            self._feed(now)
            for out in self.processor.collect(max(0.0, min(0.05, next_sensor - now, next_health - now))):
                self._publish(pub, out)

    def run(self, stop: threading.Event) -> None:
        """Bind, warm up (with workers: start them and wait until they are ready), connect, then serve
        until `stop` is set (returns within ~0.1 s of it; with local workers within ~0.8 s)."""
        ctx = zmq.Context()
        pub = rx = None
        try:
            pub = self._bind_pub(ctx)
            self.processor.start(ctx, stop)
            rx = self._start_receiver(ctx)
            self._loop(pub, stop)
        finally:
            self._rx_stop.set()
            self._error_log.flush(log, force=True, prefix="cubecast serve: ")
            if rx is not None:
                rx.join(timeout=2.0)
            receiver_stopped = rx is None or not rx.is_alive()
            if pub is not None:
                pub.close(linger=0)
            self.processor.close(receiver_stopped)
            if receiver_stopped:
                ctx.term()


def serve(sensor_path: str, sub: str | list[str], pub: str, settings_path: str | None = None,
          calibration_path: str | None = None, queue_depth: int = 2, rdmap_max_hz: float = 5.0,
          workers: int = 0, tasks: str | None = None, results: str | None = None,
          task_timeout_s: float | None = None, server_key: str | None = None,
          worker_keys: str | None = None) -> int:
    """`cubecast serve`: run until SIGINT/SIGTERM; exit code 0."""
    sensor = load_sensor(sensor_path)
    settings = load_settings(settings_path)
    calibration, range_bias_m = load_calibration_for(calibration_path, sensor)
    if (server_key is None) != (worker_keys is None):
        raise CubecastError("serve's secret key and the folder of accepted worker keys: give both or neither")
    keys = ServerKeys(server_key, worker_keys) if server_key is not None else None
    stop = threading.Event()
    with stop_on_signals(stop):
        svc = Service(sensor, sub, pub, settings, calibration, queue_depth=queue_depth, rdmap_max_hz=rdmap_max_hz,
                      range_bias_m=range_bias_m, workers=workers, tasks_endpoint=tasks, results_endpoint=results,
                      task_timeout_s=task_timeout_s, worker_keys=keys)
        if not stop.is_set():
            svc.run(stop)
    s = svc.stats()
    log.info("cubecast serve: stopped: %d frames received, %d processed, %d dropped, %d rejected%s",
             s["frames_received"], s["frames_processed"], s["frames_dropped"], s["frames_rejected"],
             f", {s['frames_lost_worker']} lost with workers" if isinstance(svc.processor, PoolProcessor) else "")
    return 0
