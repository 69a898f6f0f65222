"""The streaming daemon: ADC frames in over ZeroMQ, point clouds (and display maps, sensor description,
health) out. `cubecast serve`.

Two threads:

- the receiver thread owns the SUB socket (connected to the source). It decodes and validates every
  message (wire.decode, then AdcValidator: sensor id, digest, dtype, shape, repeated sequence
  numbers), counts rejections by reason, counts sequence gaps and source restarts (a new `run` id),
  and appends good frames to a bounded queue that drops the OLDEST frame when full, so latency stays
  bounded and memory flat when processing falls behind;
- the processing thread (the caller of Service.run) owns the PUB socket (an XPUB, so that a new
  subscriber is noticed and sent the sensor description at once). It takes frames from the queue,
  converts them to canonical complex64 into a reused buffer, runs the Pipeline and publishes the
  points, a rate-limited max-pooled range-Doppler map, the sensor description (on start, on every
  new subscription and every 2 s) and health once a second.

Publishing never blocks: a PUB socket drops messages for a subscriber whose queue (SNDHWM) is full, so
a slow subscriber only loses its own messages. Buffers handed to ZeroMQ without a copy are always
fresh arrays (the point records and pooled map are new per frame), never reused buffers.

Counters obey: frames_received == frames_processed + frames_dropped + frames_rejected + queue_depth
+ in_progress + frames_lost_worker + in_flight, read atomically under one lock (the last two are
non-zero only with workers).

With workers (`serve --workers N`, or `--tasks`/`--results` for workers on other hosts; see
daemon/workers.py) the processing thread does not run the chain itself: it hands queued frames to
workers with free capacity, collects their results and publishes them in frame order.
"""

from __future__ import annotations

import collections
import contextlib
import math
import signal
import sys
import threading
import time
from typing import Callable

import numpy as np
import zmq

from .chain.points import to_records
from .errors import CubecastError
from .files import to_canonical
from .sensor import Sensor
from .settings import ProcessingSettings
from .wire import (REASONS, Message, WireError, decode, encode_health, encode_points, encode_rdmap,
                   encode_sensor)

DEFAULT_SUB = "tcp://127.0.0.1:5601"
DEFAULT_PUB = "tcp://127.0.0.1:5602"


# ---- helpers shared by serve, the sources and the demo -----------------------------------------

@contextlib.contextmanager
def stop_on_signals(stop: threading.Event):
    """Within the block, SIGINT and SIGTERM set `stop` instead of killing the process (main thread
    only; elsewhere a no-op). Previous handlers are restored on exit."""
    if threading.current_thread() is not threading.main_thread():
        yield stop
        return
    previous = {}

    def handler(signum, frame):
        stop.set()

    for sig in (signal.SIGINT, signal.SIGTERM):
        previous[sig] = signal.signal(sig, handler)
    try:
        yield stop
    finally:
        for sig, h in previous.items():
            signal.signal(sig, h)


def bind_socket(sock: zmq.Socket, endpoint: str, option: str) -> str:
    """Bind and return the actual endpoint (resolves tcp://host:* and port 0)."""
    try:
        sock.bind(endpoint)
    except zmq.ZMQError as exc:
        raise CubecastError(f"{option} {endpoint}: cannot bind: {exc}") from None
    return sock.getsockopt_string(zmq.LAST_ENDPOINT)


def connect_socket(sock: zmq.Socket, endpoint: str, option: str) -> None:
    try:
        sock.connect(endpoint)
    except zmq.ZMQError as exc:
        raise CubecastError(f"{option} {endpoint}: cannot connect: {exc}") from None


class RateLimitedLog:
    """At most one line per reason per interval; suppressed lines are summarised in the next one."""

    def __init__(self, write: Callable[[str], None], interval_s: float = 5.0, prefix: str = ""):
        self.write, self.interval_s, self.prefix = write, interval_s, prefix
        self._last: dict[str, float] = {}
        self._pending: dict[str, tuple[int, str]] = {}
        self._lock = threading.Lock()

    def __call__(self, reason: str, text: str) -> None:
        now = time.monotonic()
        with self._lock:
            n, _ = self._pending.get(reason, (0, ""))
            if now - self._last.get(reason, -math.inf) >= self.interval_s:
                self._last[reason] = now
                self._pending.pop(reason, None)
                more = f" (and {n} more since the last report)" if n else ""
                line = f"{self.prefix}{reason}: {text}{more}"
            else:
                self._pending[reason] = (n + 1, text)
                return
        self.write(line)

    def flush(self, force: bool = False) -> None:
        now = time.monotonic()
        lines = []
        with self._lock:
            for reason, (n, text) in list(self._pending.items()):
                if force or now - self._last.get(reason, -math.inf) >= self.interval_s:
                    self._last[reason] = now
                    del self._pending[reason]
                    lines.append(f"{self.prefix}{reason}: {n} more in the last {self.interval_s:g} s; "
                                 f"latest: {text}")
        for line in lines:
            self.write(line)


def _stderr_line(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


# ---- validation of incoming ADC frames (pure, no sockets) ----------------------------------------

class AdcValidator:
    """Checks decoded messages against one sensor and tracks (run, seq). Not thread-safe: one per
    receiver. Accepted: the sensor's ADC format (raw dtype and shape) or canonical complex64."""

    def __init__(self, sensor: Sensor):
        self.sensor = sensor
        self.raw_dtype = sensor.adc.raw_dtype().str
        self.raw_shape = sensor.adc.raw_shape(sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        self.canonical_shape = (sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        self.max_payload_bytes = max(int(np.prod(self.raw_shape)) * sensor.adc.raw_dtype().itemsize,
                                     int(np.prod(self.canonical_shape)) * 8)
        self.run: str | None = None
        self.last_seq = -1
        self.sequence_gaps = 0
        self.source_restarts = 0

    def check(self, msg: Message) -> int:
        """Raise WireError if `msg` is not an acceptable frame; otherwise update the sequence tracking
        and return the number of frames missing just before it (a gap)."""
        s = self.sensor
        if msg.kind != "adc":
            raise WireError("malformed", f"kind '{msg.kind}' on the input bus; serve accepts 'adc' messages only")
        if msg.sensor_id != s.sensor_id:
            raise WireError("unknown_sensor", f"adc header field 'sensor_id' = {msg.sensor_id!r}: this daemon "
                                              f"serves sensor {s.sensor_id!r}")
        h = msg.header
        if h["digest"] != s.digest:
            raise WireError("digest", f"adc header field 'digest' = {h['digest']!r}: the daemon's description of "
                                      f"'{s.sensor_id}' has digest {s.digest!r} (the source uses another "
                                      "sensor description)")
        if h["dtype"] not in (self.raw_dtype, "<c8"):
            raise WireError("dtype", f"adc header field 'dtype' = {h['dtype']!r}: sensor '{s.sensor_id}' sends "
                                     f"{self.raw_dtype!r} (or canonical '<c8')")
        expected = self.raw_shape if h["dtype"] == self.raw_dtype else self.canonical_shape
        if tuple(h["shape"]) != tuple(expected):
            raise WireError("shape", f"adc header field 'shape' = {list(h['shape'])}: dtype {h['dtype']} frames "
                                     f"of sensor '{s.sensor_id}' have shape {list(expected)}")
        run, seq = h["run"], h["seq"]
        gap = 0
        if run != self.run:
            if self.run is not None:
                self.source_restarts += 1
            self.run = run
        elif seq <= self.last_seq:
            raise WireError("repeated", f"adc header field 'seq' = {seq}: not after the last accepted frame "
                                        f"{self.last_seq} of run {run!r}")
        else:
            gap = seq - self.last_seq - 1
            self.sequence_gaps += gap
        self.last_seq = seq
        return gap


# ---- display map -------------------------------------------------------------------------------

def pool_rdmap(power: np.ndarray, range_bin_m: float, velocity_bin_mps: float, max_range_cells: int = 128,
               max_doppler_cells: int = 64) -> tuple[np.ndarray, float, float, float, float]:
    """Max-pool a range-Doppler power map (float [range, doppler], Doppler fft-shifted: column j is
    (j - n_doppler // 2) velocity bins) to at most max_range_cells x max_doppler_cells and convert to
    dB relative to the median of the full-resolution map (0 dB = the noise floor).
    Returns (values_db float32, range_start_m, range_step_m, velocity_start_mps, velocity_step_mps),
    the start being the centre of the first pooled cell."""
    n_r, n_d = power.shape
    fr = -(-n_r // max_range_cells)
    fd = -(-n_d // max_doppler_cells)
    pr, pd = -(-n_r // fr) * fr, -(-n_d // fd) * fd
    src = power
    if (pr, pd) != (n_r, n_d):
        src = np.full((pr, pd), -np.inf, np.float32)
        src[:n_r, :n_d] = power
    pooled = src.reshape(pr // fr, fr, pd // fd, fd).max(axis=(1, 3)) if (fr, fd) != (1, 1) else src
    tiny = np.float32(1e-30)
    floor = max(float(np.median(power)), float(tiny))
    values = (10.0 * np.log10(np.maximum(pooled, tiny)) - 10.0 * math.log10(floor)).astype(np.float32)
    range_start = 0.5 * (fr - 1) * range_bin_m
    velocity_start = (0.5 * (fd - 1) - n_d // 2) * velocity_bin_mps
    return values, range_start, fr * range_bin_m, velocity_start, fd * velocity_bin_mps


# ---- the service ---------------------------------------------------------------------------------

class Service:
    """The daemon loop, usable in-process (Service(...).run(stop_event) in a thread; wait for
    `ready`, then read `pub_endpoint`) and from the CLI.

    sub_endpoint: the source's PUB endpoint(s) to connect to; pub_endpoint: where to bind (tcp://...:*
    or port 0 picks a free port). queue_depth: frames waiting for processing; when full the oldest
    is dropped."""

    def __init__(self, sensor: Sensor, sub_endpoint: str | list[str] = DEFAULT_SUB, pub_endpoint: str = DEFAULT_PUB,
                 settings: ProcessingSettings | None = None, calibration: np.ndarray | None = None, *,
                 queue_depth: int = 2, rdmap_max_hz: float = 5.0, sensor_interval_s: float = 2.0,
                 health_interval_s: float = 1.0, log_interval_s: float = 5.0, sndhwm: int = 100,
                 sndbuf_bytes: int = 0, rcvhwm: int = 16, log: Callable[[str], None] | None = None,
                 quiet: bool = False, range_bias_m: float = 0.0, workers: int = 0,
                 tasks_endpoint: str | None = None, results_endpoint: str | None = None,
                 task_timeout_s: float | None = None, worker_quiet: bool = True, worker_keys=None):
        """workers: local worker processes to start; tasks_endpoint / results_endpoint: where to bind
        for workers (both or neither; default tcp://127.0.0.1:* when workers > 0). With either, frames
        are processed by workers (daemon/workers.py), else in this process. worker_keys: a
        keys.ServerKeys to require keys of the workers (CURVE)."""
        if isinstance(queue_depth, bool) or not isinstance(queue_depth, int) or queue_depth < 1:
            raise CubecastError(f"--queue {queue_depth!r}: must be a whole number of at least 1")
        if not (rdmap_max_hz >= 0 and math.isfinite(rdmap_max_hz)):
            raise CubecastError(f"--rdmap-rate {rdmap_max_hz!r}: must be a finite number >= 0 (0 = off)")
        self.sensor = sensor
        self.settings = (settings or ProcessingSettings()).validate()
        from .chain.pipeline import Pipeline  # imported here: the sources share this module without numba
        self.pipeline = Pipeline(sensor, self.settings, calibration, range_bias_m)
        self.sub_endpoints = [sub_endpoint] if isinstance(sub_endpoint, str) else list(sub_endpoint)
        self.pub_endpoint_requested = pub_endpoint
        self.pub_endpoint: str | None = None
        self.queue_depth = queue_depth
        self.rdmap_period_s = 1.0 / rdmap_max_hz if rdmap_max_hz > 0 else math.inf
        self.sensor_interval_s = sensor_interval_s
        self.health_interval_s = health_interval_s
        self.sndhwm, self.sndbuf_bytes, self.rcvhwm = sndhwm, sndbuf_bytes, rcvhwm
        self.quiet = quiet
        self._write = log or _stderr_line
        self._reject_log = RateLimitedLog(self._write, log_interval_s, "cubecast serve: rejected frame, ")
        self._error_log = RateLimitedLog(self._write, log_interval_s, "cubecast serve: ")
        self.validator = AdcValidator(sensor)
        self.ready = threading.Event()
        self.pool = None
        if (tasks_endpoint is None) != (results_endpoint is None):
            raise CubecastError("--tasks and --results: give both endpoints for workers, or neither")
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
            raise CubecastError(f"--workers {workers!r}: must be a whole number >= 0")
        if worker_keys is not None and not (workers > 0 or tasks_endpoint is not None):
            raise CubecastError("--server-key and --worker-keys: only with --workers or --tasks")
        if workers > 0 or tasks_endpoint is not None:
            from .workers import DEFAULT_TASK_TIMEOUT_S, WorkerConfig, WorkerPool
            self.pool = WorkerPool(
                WorkerConfig(sensor, self.settings, calibration, float(range_bias_m)),
                tasks_endpoint or "tcp://127.0.0.1:*", results_endpoint or "tcp://127.0.0.1:*",
                local_workers=workers, task_timeout_s=DEFAULT_TASK_TIMEOUT_S if task_timeout_s is None
                else task_timeout_s, log=self._write, quiet=quiet, worker_quiet=worker_quiet, keys=worker_keys)
        self._stage_ms = self.pipeline.stage_ms
        self._in_flight = 0
        self._lost = 0
        self._wake_push: zmq.Socket | None = None

        self._cond = threading.Condition()
        self._queue: collections.deque = collections.deque()
        self._received = self._processed = self._dropped = self._rejected = 0
        self._in_progress = 0
        self._by_reason = dict.fromkeys(REASONS, 0)
        self._queue_high_water = 0
        self._processing_errors = 0
        self._points_last = 0
        self._latencies_s: collections.deque = collections.deque(maxlen=100_000)
        self._all_latencies_s: collections.deque = collections.deque(maxlen=100_000)
        self._canon = np.zeros(self.pipeline.frame_shape, np.complex64)
        self._raw_dtype = sensor.adc.raw_dtype()
        self._rx_stop = threading.Event()
        self._started = time.monotonic()
        self.messages_published = collections.Counter()

    # ---- statistics -----------------------------------------------------------------------
    def stats(self) -> dict:
        """A consistent snapshot of the counters (the health fields without the interval figures)."""
        with self._cond:
            return {
                "frames_received": self._received, "frames_processed": self._processed,
                "frames_dropped": self._dropped, "frames_rejected": self._rejected,
                "rejected": {k: v for k, v in self._by_reason.items() if v},
                "queue_depth": len(self._queue), "in_progress": self._in_progress,
                "queue_high_water": self._queue_high_water,
                "sequence_gaps": self.validator.sequence_gaps, "source_restarts": self.validator.source_restarts,
                "processing_errors": self._processing_errors, "points_last": self._points_last,
                "frames_lost_worker": self._lost, "in_flight": self._in_flight,
                **({"workers": self.pool.rows, **self.pool.counters()} if self.pool is not None else {}),
            }

    def latencies_s(self) -> np.ndarray:
        """Receive-to-publish latency of every published cloud so far (most recent 100 000)."""
        with self._cond:
            return np.array(self._all_latencies_s, np.float64)

    # ---- receiver thread ------------------------------------------------------------------
    def _on_message(self, parts: list, t_recv: float) -> None:
        try:
            msg = decode(parts, max_payload_bytes=self.validator.max_payload_bytes)
            self.validator.check(msg)
        except WireError as exc:
            with self._cond:
                self._received += 1
                self._rejected += 1
                self._by_reason[exc.reason] += 1
            self._reject_log(exc.reason, str(exc))
            return
        with self._cond:
            self._received += 1
            if len(self._queue) >= self.queue_depth:
                self._queue.popleft()
                self._dropped += 1
            self._queue.append((msg, t_recv))
            self._queue_high_water = max(self._queue_high_water, len(self._queue))
            self._cond.notify()
        if self._wake_push is not None:  # workers: wake the processing thread from its socket poll
            try:
                self._wake_push.send(b"", zmq.NOBLOCK)
            except zmq.Again:  # a wake-up is already pending
                pass

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
                self._reject_log.flush()
        finally:
            self._reject_log.flush(force=True)
            sub.close(linger=0)

    # ---- processing thread ----------------------------------------------------------------
    def _warm_up(self) -> None:
        """Run the chain on the frames of workers.warm_up_pipeline (zeros, a tone in noise, the ADC
        format from a read-only buffer), so that every compiled stage (including the per-detection
        ones) is loaded before the first real frame."""
        from .workers import warm_up_pipeline
        warm_up_pipeline(self.pipeline)

    def _send(self, pub: zmq.Socket, parts: list, kind: str) -> None:
        try:
            pub.send_multipart(parts, flags=zmq.NOBLOCK, copy=False)
            self.messages_published[kind] += 1
        except zmq.Again:  # a PUB socket drops instead; kept for XPUB_NODROP setups
            self.messages_published["dropped_" + kind] += 1

    def _publish_frame(self, pub: zmq.Socket, msg: Message, t_recv: float, now: float) -> None:
        if msg.data.dtype == self._raw_dtype:  # the board's format: converted inside the range stage
            points = self.pipeline.process_raw(msg.data)
        else:
            points = self.pipeline.process(to_canonical(self.sensor, msg.data, self._canon))
        seq, ts = msg.header["seq"], msg.header["timestamp_s"]
        records = to_records(points, seq, ts)
        latency = time.perf_counter() - t_recv
        self._send(pub, encode_points(self.sensor.sensor_id, seq, msg.header["run"], ts, latency, records), "points")
        with self._cond:
            self._latencies_s.append(latency)
            self._all_latencies_s.append(latency)
            self._points_last = int(records.shape[0])
        if now - self._last_rdmap >= self.rdmap_period_s:
            self._last_rdmap = now
            bin_v = self.pipeline.doppler_fft.bin_hz * self.sensor.wavelength_m / 2.0
            values, r0, dr, v0, dv = pool_rdmap(self.pipeline.detection_map, self.pipeline.range_fft.bin_m, bin_v)
            self._send(pub, encode_rdmap(self.sensor.sensor_id, seq, ts, values, r0, dr, v0, dv), "rdmap")

    def _health(self, now: float) -> dict:
        interval = max(now - self._last_health, 1e-9)
        cpu = time.process_time()
        with self._cond:
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
            "stage_ms": {k: float(v) for k, v in self._stage_ms.items()},
            "source_run": self.validator.run,
            "frames_lost_worker": s["frames_lost_worker"], "in_flight": s["in_flight"],
        }
        if self.pool is not None:
            fields.update({k: s[k] for k in ("workers", "workers_alive", "workers_refused",
                                             "worker_results_discarded", "worker_handshakes_refused")})
        self._last_health, self._last_cpu, self._last_processed = now, cpu, processed
        return fields

    # ---- with workers ---------------------------------------------------------------------
    def _start_pool(self, ctx: zmq.Context, stop: threading.Event) -> zmq.Socket:
        """Fill the numba cache here first (so that workers only load it, never race compiling it),
        bind the worker endpoints, start the local workers and wait until each reports ready."""
        from .workers import STARTUP_TIMEOUT_S, warm_up_pipeline
        warm_up_pipeline(self.pipeline)
        self.pipeline = self._canon = None  # workers run the chain; keep no frame-sized buffers here
        self._stage_ms = {}
        wake_pull = ctx.socket(zmq.PULL)
        wake_pull.setsockopt(zmq.LINGER, 0)
        wake_pull.setsockopt(zmq.RCVHWM, 1)
        endpoint = f"inproc://cubecast-serve-wake-{id(self)}"
        wake_pull.bind(endpoint)
        self._wake_push = ctx.socket(zmq.PUSH)
        self._wake_push.setsockopt(zmq.LINGER, 0)
        self._wake_push.setsockopt(zmq.SNDHWM, 1)
        self._wake_push.connect(endpoint)
        self.pool.bind(ctx, wake_pull)
        self.pool.start_local()
        self.pool.wait_ready(len(self.pool.slots), STARTUP_TIMEOUT_S, stop)
        return wake_pull

    def _pool_step(self, pub: zmq.Socket, timeout_s: float) -> None:
        """Hand queued frames to workers with capacity, then wait up to timeout_s for results and
        publish those now in frame order."""
        pool = self.pool
        now = time.monotonic()
        while pool.can_dispatch():
            with self._cond:
                if not self._queue:
                    break
                msg, t_recv = self._queue.popleft()
                self._in_flight += 1
            want_map = now - self._last_rdmap >= self.rdmap_period_s
            if pool.dispatch(msg, t_recv, want_map):
                if want_map:
                    self._last_rdmap = now
                continue
            with self._cond:  # no worker could take it after all: back to the head of the queue
                self._in_flight -= 1
                if len(self._queue) >= self.queue_depth:
                    self._dropped += 1  # it is the oldest frame
                else:
                    self._queue.appendleft((msg, t_recv))
            break
        completed, lost = pool.poll(int(timeout_s * 1000))
        if lost:
            with self._cond:
                self._in_flight -= len(lost)
                self._lost += len(lost)
        for entry in completed:
            self._publish_result(pub, entry)

    def _publish_result(self, pub: zmq.Socket, entry) -> None:
        res = entry.result
        entry.result = None
        if res.error is not None:
            with self._cond:
                self._processing_errors += 1
                self._processed += 1
                self._in_flight -= 1
            self._error_log("processing error", f"frame seq {entry.seq} (worker {res.worker}): {res.error}")
            return
        sid = self.sensor.sensor_id
        latency = time.perf_counter() - entry.t_recv
        self._send(pub, encode_points(sid, entry.seq, entry.run, entry.timestamp_s, latency, res.records), "points")
        if res.rdmap is not None:
            self._send(pub, encode_rdmap(sid, entry.seq, entry.timestamp_s, *res.rdmap), "rdmap")
        self._stage_ms = res.stage_ms
        with self._cond:
            self._latencies_s.append(latency)
            self._all_latencies_s.append(latency)
            self._points_last = int(res.records.shape[0])
            self._processed += 1
            self._in_flight -= 1

    def run(self, stop: threading.Event) -> None:
        """Bind, warm up (with workers: start them and wait until they are ready), connect, then serve
        until `stop` is set (returns within ~0.1 s of it; with local workers within ~0.8 s)."""
        ctx = zmq.Context()
        pub = sub = None
        rx = None
        wake_pull = None
        try:
            pub = ctx.socket(zmq.XPUB)
            pub.setsockopt(zmq.LINGER, 0)
            pub.setsockopt(zmq.SNDHWM, self.sndhwm)
            pub.setsockopt(zmq.XPUB_VERBOSE, 1)  # report every subscriber, not only new topics
            if self.sndbuf_bytes:
                pub.setsockopt(zmq.SNDBUF, self.sndbuf_bytes)
            self.pub_endpoint = bind_socket(pub, self.pub_endpoint_requested, "--pub")
            if self.pool is None:
                self._warm_up()
            else:
                wake_pull = self._start_pool(ctx, stop)
            sub = ctx.socket(zmq.SUB)
            sub.setsockopt(zmq.LINGER, 0)
            sub.setsockopt(zmq.RCVHWM, self.rcvhwm)
            # ZeroMQ disconnects a peer whose message part exceeds this (a memory guard); below it, an
            # oversized frame is received and rejected with reason 'oversized'.
            sub.setsockopt(zmq.MAXMSGSIZE, 4 * self.validator.max_payload_bytes + (2 << 20))
            sub.setsockopt(zmq.SUBSCRIBE, b"")
            for ep in self.sub_endpoints:
                connect_socket(sub, ep, "--sub")
            rx = threading.Thread(target=self._receive, args=(sub,), name="cubecast-serve-rx", daemon=True)
            sub = None  # handed to the receiver thread, which closes it
            rx.start()

            now = time.monotonic()
            self._started = self._last_health = now
            self._last_cpu = time.process_time()
            self._last_processed = 0
            self._last_rdmap = -math.inf
            next_sensor = now
            next_health = now + self.health_interval_s
            sensor_parts_interval = 0.2  # at most this often on new subscriptions
            last_sensor = -math.inf
            self.ready.set()
            if not self.quiet:
                extra = ""
                if self.pool is not None:
                    extra = (f", workers: {len(self.pool.slots)} local, tasks {self.pool.tasks_endpoint}, "
                             f"results {self.pool.results_endpoint}")
                self._write(f"cubecast serve: ready: sensor '{self.sensor.sensor_id}' (digest {self.sensor.digest}), "
                            f"sub {', '.join(self.sub_endpoints)}, pub {self.pub_endpoint}, queue {self.queue_depth}"
                            + extra)
            while not stop.is_set():
                # new subscribers: send them the sensor description now (rate-limited)
                while True:
                    try:
                        event = pub.recv(zmq.NOBLOCK)
                    except zmq.Again:
                        break
                    if event[:1] == b"\x01":
                        next_sensor = min(next_sensor, max(last_sensor + sensor_parts_interval, time.monotonic()))
                now = time.monotonic()
                if now >= next_sensor:
                    self._send(pub, encode_sensor(self.sensor, self.settings.velocity_unfolding), "sensor")
                    last_sensor = now
                    next_sensor = now + self.sensor_interval_s
                if now >= next_health:
                    self._send(pub, encode_health(self.sensor.sensor_id, self._health(now)), "health")
                    self._error_log.flush()
                    next_health = max(next_health + self.health_interval_s, now)
                timeout = max(0.0, min(0.05, next_sensor - now, next_health - now))
                if self.pool is not None:
                    self._pool_step(pub, timeout)
                    continue
                with self._cond:
                    if not self._queue:
                        self._cond.wait(timeout)
                    if not self._queue:
                        continue
                    msg, t_recv = self._queue.popleft()
                    self._in_progress = 1
                try:
                    self._publish_frame(pub, msg, t_recv, time.monotonic())
                except Exception as exc:  # one bad frame must not stop the daemon
                    with self._cond:
                        self._processing_errors += 1
                    self._error_log("processing error", f"frame seq {msg.header.get('seq')}: "
                                                         f"{type(exc).__name__}: {exc}")
                finally:
                    del msg
                    with self._cond:
                        self._processed += 1
                        self._in_progress = 0
        finally:
            self._rx_stop.set()
            self._error_log.flush(force=True)
            if rx is not None:
                rx.join(timeout=2.0)
            if sub is not None:
                sub.close(linger=0)
            if pub is not None:
                pub.close(linger=0)
            if self.pool is not None:
                self.pool.close()
            if wake_pull is not None:
                wake_pull.close(linger=0)
            if self._wake_push is not None and (rx is None or not rx.is_alive()):
                self._wake_push.close(linger=0)
                self._wake_push = None
            if rx is None or not rx.is_alive():
                ctx.term()


def serve(sensor_path: str, sub: str | list[str], pub: str, settings_path: str | None = None,
          calibration_path: str | None = None, queue_depth: int = 2, rdmap_max_hz: float = 5.0,
          quiet: bool = False, workers: int = 0, tasks: str | None = None, results: str | None = None,
          task_timeout_s: float | None = None, server_key: str | None = None,
          worker_keys: str | None = None) -> int:
    """`cubecast serve`: run until SIGINT/SIGTERM; exit code 0."""
    from .process import load_calibration_for
    from .sensor import load_sensor
    from .settings import load_settings
    sensor = load_sensor(sensor_path)
    settings = load_settings(settings_path)
    calibration, range_bias_m = load_calibration_for(calibration_path, sensor)
    keys = None
    if (server_key is None) != (worker_keys is None):
        raise CubecastError("--server-key and --worker-keys: give both (serve's secret key and the folder of "
                            "accepted worker keys) or neither")
    if server_key is not None:
        from .keys import ServerKeys
        keys = ServerKeys(server_key, worker_keys)
    stop = threading.Event()
    with stop_on_signals(stop):
        svc = Service(sensor, sub, pub, settings, calibration, queue_depth=queue_depth, rdmap_max_hz=rdmap_max_hz,
                      quiet=quiet, range_bias_m=range_bias_m, workers=workers, tasks_endpoint=tasks,
                      results_endpoint=results, task_timeout_s=task_timeout_s, worker_keys=keys)
        if not stop.is_set():
            svc.run(stop)
    if not quiet:
        s = svc.stats()
        _stderr_line(f"cubecast serve: stopped: {s['frames_received']} frames received, {s['frames_processed']} "
                     f"processed, {s['frames_dropped']} dropped, {s['frames_rejected']} rejected"
                     + (f", {s['frames_lost_worker']} lost with workers" if svc.pool is not None else ""))
    return 0
