"""The streaming daemon: ADC frames in over ZeroMQ, point clouds (and display maps, sensor description,
health) out. `cubecast serve`.

Two threads:

- the receiver thread owns the SUB socket (netio.Subscriber, connected to the source). It decodes and
  validates every message (wire.decode, then intake.AdcValidator: sensor id, digest, dtype, shape,
  repeated sequence numbers), counts rejections by reason, counts sequence gaps and source restarts
  (a new `run` id), and appends good frames to a bounded queue that drops the OLDEST frame when full,
  so latency stays bounded and memory flat when processing falls behind. An oversized or malformed
  message costs only itself: every message part up to netio.MAX_PART_BYTES is received whole and
  measured here ('oversized' when larger than the sensor's frame), so the connection to the source
  is never given up for it; a larger part, or a broken byte stream, makes ZeroMQ drop the
  connection, which the Subscriber counts (`source_protocol_errors`) and dials again at once (see
  netio.Subscriber for what bounds memory);
- the processing thread (the caller of Service.run) owns the PUB socket (an XPUB, so that a new
  subscriber is noticed and sent the sensor description at once). It hands queued frames to the
  processor and publishes what comes back: the points, the front end's monitor of the frame (kind
  `frontend`, with its warnings, daemon/frontendwarn.py; a warning is also logged, at most once per
  channel and cause per log interval), a rate-limited max-pooled range-Doppler map, the sensor
  description (on start, on every new subscription and every 2 s) and health once a second (with
  the front end's summary over the interval).

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

Keys (daemon/keys.py): with pub_keys, the publish endpoint takes only subscribers whose public key is
in a folder (refused handshakes: `subscriber_handshakes_refused` in health); with source_keys, the
SUB connects to keyed sources (refused or failed handshakes: `source_handshakes_failed`). An endpoint
reachable from other hosts is bound only with keys or with `insecure` (netio.check_exposure).

Live tuning (daemon/retune.py): a Tuner owned by the processing thread takes settings changes from
the watched settings file (settingswatch.py) and from the control endpoint (control.py, a ROUTER
polled by the processing thread), has the processor build the new chain aside and commits it
between two frames, with or without workers.

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
from .frontendwarn import FrontendSummary, frontend_warnings
from .intake import AdcValidator
from .keys import ClientKeys, ServerKeys, client_keys_per_endpoint
from .logs import RateLimitFilter, log_limited
from .netio import (DEFAULT_PUB, DEFAULT_SUB, MAX_PART_BYTES, HandshakeCounter, Subscriber, bind_socket,
                    check_exposure, stop_on_signals)
from .process import load_calibration_for
from .control import ControlEndpoint
from .processors import LocalProcessor, Outcome, PoolProcessor
from .retune import Tuner
from .sensor import Sensor, load_sensor
from .settings import ProcessingSettings, load_settings
from .wire import (FRONTEND_MAX_CHANNELS, REASONS, WireError, decode, encode_frontend, encode_health, encode_points,
                   encode_rdmap, encode_sensor)

log = logging.getLogger(__name__)

REJECTED = "cubecast serve: rejected frame, "  # the prefix of rejection records
SENSOR_ON_SUBSCRIBE_S = 0.2  # a new subscriber gets the sensor description at most this often
PUB_EXPOSES = "the point clouds, front-end monitors, range-Doppler maps, sensor description and health"
WORKERS_EXPOSE = "the ADC frames (by joining as a worker) and the chance to hand serve forged results"


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
                 task_timeout_s: float | None = None, worker_keys: ServerKeys | None = None,
                 pub_keys: ServerKeys | None = None, source_keys: list[ClientKeys] | None = None,
                 insecure: bool = False, max_part_bytes: int = MAX_PART_BYTES, watch_settings: str | None = None,
                 control_endpoint: str | None = None, control_keys: ServerKeys | None = None,
                 iq_imbalance: np.ndarray | None = None):
        """workers: local worker processes to start; tasks_endpoint / results_endpoint: where to bind
        for workers (both or neither; default tcp://127.0.0.1:* when workers > 0). With either, frames
        are processed by workers (daemon/pool.py), else in this process. worker_keys: a
        keys.ServerKeys to require keys of the workers (CURVE); pub_keys: the same for subscribers of
        the publish endpoint; source_keys: keys.ClientKeys per source endpoint (same order).
        insecure: allow binding an endpoint other hosts can reach without keys. max_part_bytes: the
        subscriber's hard limit on one message part (netio.Subscriber). watch_settings: a settings
        file to watch and apply live (settingswatch.py). control_endpoint: where to bind the control
        endpoint (control.py); control_keys: a keys.ServerKeys to require keys of its clients.
        calibration, range_bias_m, iq_imbalance: as the Pipeline takes them (calibfile.load_chain_calibration)."""
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
        self.sub_endpoints = [sub_endpoint] if isinstance(sub_endpoint, str) else list(sub_endpoint)
        if source_keys is not None and len(source_keys) != len(self.sub_endpoints):
            raise CubecastError(f"source keys: {len(source_keys)} given for {len(self.sub_endpoints)} source "
                                "endpoints; one per endpoint")
        # before anything is bound: endpoints other hosts can reach need keys (or insecure, logged)
        check_exposure(pub_endpoint, "publish endpoint", keyed=pub_keys is not None, insecure=insecure,
                       exposes=PUB_EXPOSES)
        if control_keys is not None and control_endpoint is None:
            raise CubecastError("control keys: only with a control endpoint")
        for role, ep in (("tasks endpoint", tasks_endpoint), ("results endpoint", results_endpoint)):
            if ep is not None:
                check_exposure(ep, role, keyed=worker_keys is not None, insecure=insecure, exposes=WORKERS_EXPOSE,
                               keys_hint="--server-key FILE --worker-keys DIR")
        self.pub_keys, self.source_keys, self.max_part_bytes = pub_keys, source_keys, max_part_bytes
        self._subscriber: Subscriber | None = None
        self._pub_counter: HandshakeCounter | None = None
        self._pub_refused = 0
        self.sensor = sensor
        self.settings = (settings or ProcessingSettings()).validate()
        if workers > 0 or tasks_endpoint is not None:
            self.processor = PoolProcessor(
                sensor, self.settings, calibration, range_bias_m, tasks_endpoint or "tcp://127.0.0.1:*",
                results_endpoint or "tcp://127.0.0.1:*", local_workers=workers, task_timeout_s=task_timeout_s,
                keys=worker_keys, log_interval_s=log_interval_s, iq_imbalance=iq_imbalance)
        else:
            self.processor = LocalProcessor(sensor, self.settings, calibration, range_bias_m, iq_imbalance)
        self._tuner = Tuner(self.settings, self.processor, watch_settings)
        self._tuning = watch_settings is not None or control_endpoint is not None
        self._control = ControlEndpoint(control_endpoint, self._tuner, control_keys) if control_endpoint else None
        self.control_endpoint: str | None = None
        self.pub_endpoint_requested = pub_endpoint
        self.pub_endpoint: str | None = None
        self.queue_depth = queue_depth
        self.rdmap_period_s = 1.0 / rdmap_max_hz if rdmap_max_hz > 0 else math.inf
        self.sensor_interval_s = sensor_interval_s
        self.health_interval_s = health_interval_s
        self.sndhwm, self.sndbuf_bytes, self.rcvhwm = sndhwm, sndbuf_bytes, rcvhwm
        self._reject_log = RateLimitFilter(log_interval_s)
        self._error_log = RateLimitFilter(log_interval_s)
        self._frontend_log = RateLimitFilter(log_interval_s)
        self.frontend = FrontendSummary(sensor.n_rx)  # over the health interval (the processing thread's)
        self._frontend_on = sensor.n_rx <= FRONTEND_MAX_CHANNELS
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
                **self._link_counters(), **self.processor.counters(),
            }

    def _link_counters(self) -> dict:
        sub = self._subscriber
        return {"source_protocol_errors": sub.protocol_errors if sub else 0,
                "source_handshakes_failed": sub.handshakes_failed if sub else 0,
                "subscriber_handshakes_refused": self._pub_refused}

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

    def _receive(self, sub: Subscriber) -> None:
        try:
            while not self._rx_stop.is_set():
                if sub.poll(100):
                    for _ in range(1000):  # drain a burst, then look at the stop flag again
                        parts = sub.recv()
                        if parts is None:
                            break
                        self._on_message(parts, time.perf_counter())
                        del parts  # an oversized part is freed now, not when the next one arrives
                self._reject_log.flush(log, prefix=REJECTED)
                sub.flush_log()
        finally:
            self._reject_log.flush(log, force=True, prefix=REJECTED)
            sub.close()

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
        if out.frontend is not None and self._frontend_on:
            self._publish_frontend(pub, out)
        if out.rdmap is not None:
            self._send(pub, encode_rdmap(sid, out.seq, out.timestamp_s, *out.rdmap()), "rdmap")
        with self._lock:
            self._latencies_s.append(latency)
            self._all_latencies_s.append(latency)
            self._points_last = int(out.records.shape[0])
            self._processed += 1
            self._busy -= 1

    def _publish_frontend(self, pub: zmq.Socket, out: Outcome) -> None:
        """The frame's front-end monitor with its warnings; each warning logged (rate-limited per channel
        and cause) and counted into the interval's summary."""
        warnings = frontend_warnings(out.frontend, self.sensor.adc.full_scale)
        self.frontend.add(out.frontend, warnings)
        for w in warnings:
            log_limited(log, self._frontend_log, logging.WARNING, f"rx {w.rx} {w.cause}",
                        "cubecast serve: front end: frame %d: %s", out.seq, w.text)
        self._send(pub, encode_frontend(self.sensor.sensor_id, out.seq, out.run, out.timestamp_s, out.frontend,
                                        self.sensor.adc.full_scale, [w.as_map() for w in warnings]), "frontend")

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
            "source_protocol_errors": s["source_protocol_errors"],
            "source_handshakes_failed": s["source_handshakes_failed"],
            "subscriber_handshakes_refused": s["subscriber_handshakes_refused"],
            **{k: s[k] for k in self.processor.health_fields},
            "frontend": self.frontend.health(),
        }
        self.frontend.reset()
        if self._tuning:
            fields.update(self._tuner.health_fields())
        if self._control is not None:
            fields.update(self._control.counters())
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
            if self.pub_keys is not None:
                self.pub_keys.start(ctx)  # the authenticator of this context, before anything can connect
                self.pub_keys.apply(pub)
                self._pub_counter = HandshakeCounter(pub, "publish endpoint", "cubecast serve")
            self.pub_endpoint = bind_socket(pub, self.pub_endpoint_requested, "publish endpoint")
        except BaseException:
            self._close_pub(pub)
            raise
        return pub

    def _close_pub(self, pub: zmq.Socket) -> None:
        if self._pub_counter is not None:
            self._pub_refused = self._pub_counter.count()
            self._pub_counter.close()
            self._pub_counter = None
        pub.close(linger=0)
        if self.pub_keys is not None:
            self.pub_keys.stop()

    def _start_receiver(self, ctx: zmq.Context) -> threading.Thread:
        sub = self._subscriber = Subscriber(ctx, self.sub_endpoints, "source endpoint", rcvhwm=self.rcvhwm,
                                            prefix="cubecast serve", max_part_bytes=self.max_part_bytes,
                                            keys=self.source_keys)
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
        if not self._frontend_on:
            log.warning("cubecast serve: sensor '%s' has %d receive channels; the wire's front-end monitor takes at "
                        "most %d, so none is published", self.sensor.sensor_id, self.sensor.n_rx, FRONTEND_MAX_CHANNELS)
        log.info("cubecast serve: ready: sensor '%s' (digest %s), sub %s%s, pub %s%s, queue %d%s%s",
                 self.sensor.sensor_id, self.sensor.digest, ", ".join(self.sub_endpoints),
                 " (with keys)" if self.source_keys else "", self.pub_endpoint,
                 " (keys required)" if self.pub_keys else "", self.queue_depth, self.processor.describe(),
                 f", control {self.control_endpoint}" if self._control else "")
        while not stop.is_set():
            while True:  # new subscribers: send them the sensor description now (rate-limited)
                try:
                    event = pub.recv(zmq.NOBLOCK)
                except zmq.Again:
                    break
                if event[:1] == b"\x01":
                    next_sensor = min(next_sensor, max(last_sensor + SENSOR_ON_SUBSCRIBE_S, time.monotonic()))
            if self._pub_counter is not None:
                self._pub_refused = self._pub_counter.count()
            now = time.monotonic()
            if now >= next_sensor:
                self._send(pub, encode_sensor(self.sensor, self.settings.velocity_unfolding), "sensor")
                last_sensor = now
                next_sensor = now + self.sensor_interval_s
            if now >= next_health:
                self._send(pub, encode_health(self.sensor.sensor_id, self._health(now)), "health")
                self._error_log.flush(log, prefix="cubecast serve: ")
                self._frontend_log.flush(log, prefix="cubecast serve: front end: ")
                next_health = max(next_health + self.health_interval_s, now)
            if self._control is not None:
                self._control.poll()
            if self._tuning:
                applied = self._tuner.poll(now)
                if applied is not None:
                    self.settings = applied
                    next_sensor = now   # the sensor message carries settings (velocity unfolding)
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
            if self._control is not None:
                self.control_endpoint = self._control.bind(ctx)
            rx = self._start_receiver(ctx)
            self._loop(pub, stop)
        finally:
            self._rx_stop.set()
            self._error_log.flush(log, force=True, prefix="cubecast serve: ")
            self._frontend_log.flush(log, force=True, prefix="cubecast serve: front end: ")
            if rx is not None:
                rx.join(timeout=2.0)
            receiver_stopped = rx is None or not rx.is_alive()
            if pub is not None:
                self._close_pub(pub)
            if self._control is not None:
                self._control.close()
            self.processor.close(receiver_stopped)
            if receiver_stopped:
                ctx.term()


def serve(sensor_path: str, sub: str | list[str], pub: str, settings_path: str | None = None,
          calibration_path: str | None = None, queue_depth: int = 2, rdmap_max_hz: float = 5.0,
          workers: int = 0, tasks: str | None = None, results: str | None = None,
          task_timeout_s: float | None = None, server_key: str | None = None,
          worker_keys: str | None = None, client_keys: str | None = None, source_keys: list[str] | None = None,
          insecure: bool = False, watch_settings: bool = False, control: str | None = None,
          control_keys: str | None = None) -> int:
    """`cubecast serve`: run until SIGINT/SIGTERM; exit code 0. server_key: serve's secret key, for
    each of worker_keys (folder of accepted workers), client_keys (folder of accepted subscribers),
    control_keys (folder of accepted clients of the control endpoint `control`) and source_keys (the
    sources' public keys: one for all, or one per endpoint of `sub`)."""
    if watch_settings and settings_path is None:
        raise CubecastError("--watch-settings: give the file to watch with --settings")
    sensor = load_sensor(sensor_path)
    settings = load_settings(settings_path)
    cal = load_calibration_for(calibration_path, sensor)
    subs = [sub] if isinstance(sub, str) else list(sub)
    if control_keys is not None and control is None:
        raise CubecastError("--control-keys: only with --control ENDPOINT")
    if server_key is None and (worker_keys or client_keys or source_keys or control_keys):
        raise CubecastError("--worker-keys, --client-keys, --control-keys and --source-key: each needs --server-key "
                            "(serve's secret key, NAME.key_secret from `cubecast keys`)")
    if server_key is not None and not (worker_keys or client_keys or source_keys or control_keys):
        raise CubecastError("--server-key: give it with --worker-keys DIR (workers), --client-keys DIR "
                            "(subscribers), --control-keys DIR (control clients) and/or --source-key FILE (sources)")
    keys = pub_keys = sub_keys = ctl_keys = None
    if server_key is not None:
        if worker_keys is not None:
            keys = ServerKeys(server_key, worker_keys, clients="worker", key_role="--server-key",
                              dir_role="--worker-keys")
        if client_keys is not None:
            pub_keys = ServerKeys(server_key, client_keys, clients="subscriber", key_role="--server-key",
                                  dir_role="--client-keys")
        if control_keys is not None:
            ctl_keys = ServerKeys(server_key, control_keys, clients="controller", key_role="--server-key",
                                  dir_role="--control-keys")
        sub_keys = client_keys_per_endpoint(subs, source_keys, server_key if source_keys else None,
                                            server_role="--source-key", key_role="--server-key", endpoint_role="--sub")
    stop = threading.Event()
    with stop_on_signals(stop):
        svc = Service(sensor, subs, pub, settings, cal.vector, queue_depth=queue_depth, rdmap_max_hz=rdmap_max_hz,
                      range_bias_m=cal.range_bias_m, workers=workers, tasks_endpoint=tasks, results_endpoint=results,
                      task_timeout_s=task_timeout_s, worker_keys=keys, pub_keys=pub_keys, source_keys=sub_keys,
                      insecure=insecure, watch_settings=settings_path if watch_settings else None,
                      control_endpoint=control, control_keys=ctl_keys, iq_imbalance=cal.iq_imbalance)
        if not stop.is_set():
            svc.run(stop)
    s = svc.stats()
    log.info("cubecast serve: stopped: %d frames received, %d processed, %d dropped, %d rejected%s",
             s["frames_received"], s["frames_processed"], s["frames_dropped"], s["frames_rejected"],
             (f", {s['frames_lost_worker']} lost with workers" if isinstance(svc.processor, PoolProcessor) else "")
             + "".join(f", {s[k]} {k.replace('_', ' ')}" for k in ("subscriber_handshakes_refused",
                       "source_handshakes_failed", "source_protocol_errors") if s[k]))
    return 0
