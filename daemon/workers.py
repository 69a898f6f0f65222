"""Worker processes: `cubecast serve --workers N` and `cubecast worker`.

serve fans frames out to worker processes (local subprocesses it starts itself, or workers on other
hosts) and re-sequences their point clouds in frame order before publishing them. The sockets:

    serve BINDs  a ROUTER on the tasks endpoint    <-  each worker CONNECTs a DEALER
    serve BINDs  a PULL   on the results endpoint  <-  each worker CONNECTs a PUSH

Workers connect to serve (never the reverse), so a worker on another host needs nothing but the two
endpoints, and workers can come and go while serve runs:

    cubecast serve --sensor S.toml --tasks tcp://0.0.0.0:5603 --results tcp://0.0.0.0:5604 [--workers N]
    cubecast worker --connect tcp://SERVE:5603 --results tcp://SERVE:5604 [--sensor S.toml]

`--workers N` alone binds both on free loopback ports and starts N local workers. The ROUTER gives
serve a per-worker address, so frames go only to workers with free capacity (credit-based: a worker
announces how many tasks it may hold, 2 by default: one being processed, one waiting); a plain PUSH
would deal tasks round robin, blindly, and stall on a dead worker's pipe.

This is an internal protocol, version 1 (`proto` in every header), not the public wire of wire.md;
its messages are multipart [kind, header (msgpack map), payload...] decoded with bounded msgpack
(no pickle, no ext types) and validated field by field:

    worker -> serve (DEALER)  hello {worker, name, pid, host, capacity, expect_digest}
                              ready {worker, session, digest, warm_up_s}
                              beat  {worker, session}                     every 0.25 s when idle
                              bye   {worker}                              on a clean exit
    serve -> worker (ROUTER)  welcome {session, sensor_toml, digest, settings, range_bias_m,
                                       calibration} + calibration bytes   the whole configuration
                              refuse  {reason, message}                   e.g. a sensor digest mismatch
                              who     {session}                           "introduce yourself again"
                              task    {session, task_id, seq, run, timestamp_s, received_unix_s,
                                       digest, dtype, shape, crc32, rdmap} + the raw ADC payload
    worker -> serve (PUSH)    result  {worker, session, task_id, seq, count, error, stage_ms,
                                       process_s, rdmap} + point records + pooled map (or empty)

Handshake: a worker sends `hello`; serve answers `welcome` with the sensor description (TOML text,
re-parsed and digest-checked by the worker), the processing settings and the calibration, so every
worker computes exactly what serve would. A worker started with `--sensor` states that description's
digest in its hello; serve refuses a mismatch and the worker exits with an error naming both. The
worker builds its Pipeline, warms it up and sends `ready`; only then does serve count its capacity.
A task carries the ADC payload exactly as received from the source (zero-copy), the worker checks
its digest, dtype, shape, length and CRC-32 before processing (local workers, over loopback, skip
the CRC: serve checked it on receipt, and for a large frame it costs a quarter of the chain's time).

Re-sequencing: serve numbers tasks in dispatch order (which is arrival order) and publishes results
strictly in that order from a bounded reorder window. A task whose worker died (its local process
exited, its connection dropped, or it went silent) or whose result did not come back within the task
timeout is counted as lost (`frames_lost_worker` in health) and skipped; a result that comes back
later is discarded. serve restarts local workers that die.

Counters (health): frames_received == frames_processed + frames_dropped + frames_rejected +
frames_lost_worker + queue_depth + in_progress + in_flight, where in_flight counts frames handed to
workers and not yet published or lost (both fields are in every health message, 0 without workers).
With workers, health also carries `workers` (one map per worker: name, pid, host, local, alive,
tasks_done, tasks_lost, outstanding, capacity; at most 128), `workers_alive`, `workers_refused` and
`worker_results_discarded`.

Security (daemon/keys.py): without keys, whoever reaches the tasks endpoint can join as a worker
(and receives ADC frames), so bind it to a trusted network only. With keys (serve --server-key
--worker-keys, worker --server-key --key), every connection is authenticated and encrypted with
ZeroMQ's CURVE; a worker whose key serve does not know is refused in the handshake and exits with
an error, and serve counts such handshakes in `worker_handshakes_refused`. Local workers get a key
pair made for the run.
"""

from __future__ import annotations

import collections
import math
import os
import secrets
import signal
import socket
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import zmq

from .chain.points import RECORD_DTYPE, to_records
from .errors import CubecastError
from .keys import LOCAL_KEYS_ENV, ClientKeys, ServerKeys
from .sensor import Sensor
from .workproto import (HEARTBEAT_S, MAX_CAPACITY, MAX_CONTROL_BYTES, MAX_NAME_CHARS, ProtocolError, Result, Task,
                        WorkerConfig, decode_control, decode_hello, decode_refuse, decode_result, decode_task,
                        decode_welcome, encode_beat, encode_bye, encode_hello, encode_ready, encode_refuse,
                        encode_result, encode_task, encode_welcome, encode_who, task_ids)

DEFAULT_CAPACITY = 2
DEFAULT_TASK_TIMEOUT_S = 2.0
DEFAULT_REORDER_WINDOW = 64
HELLO_RETRY_S = 1.0
STARTUP_TIMEOUT_S = 120.0  # local workers: numba loads from the cache serve filled, but a loaded host is slow
RESTART_DELAY_S = (1.0, 30.0)  # local worker restarts: first delay, doubling up to the second

# security handshakes that failed: refused key (AUTH), keys on one side only (PROTOCOL), undecipherable
HANDSHAKE_FAILED_EVENTS = (zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                           | zmq.EVENT_HANDSHAKE_FAILED_AUTH)
MAX_HANDSHAKE_FAILURES = 3  # undecipherable handshakes in a row before a worker gives up


def _stderr_line(text: str) -> None:
    print(text, file=sys.stderr, flush=True)



# ---- the chain in a worker ------------------------------------------------------------------------

def warm_up_pipeline(pipeline) -> None:
    """Run every compiled path serve and its workers use once: canonical frames (zeros, then a tone in
    noise so the per-detection stages run) and the sensor's ADC format both from a writable buffer
    (a received ZeroMQ frame is writable) and from a read-only one (bytes; numba compiles read-only
    arrays separately). Run by serve before it subscribes and before it starts workers, so that the
    numba cache is filled once and nothing compiles at the first real frame."""
    p = pipeline
    p.process(np.zeros(p.frame_shape, np.complex64))
    rng = np.random.default_rng(0)
    noise = rng.standard_normal(p.frame_shape) + 1j * rng.standard_normal(p.frame_shape)
    tone = 50.0 * np.exp(2j * np.pi * 0.23 * np.arange(p.frame_shape[2]))
    p.process((noise + tone).astype(np.complex64))
    s = p.sensor
    raw_dtype = s.adc.raw_dtype()
    raw_shape = s.adc.raw_shape(*p.frame_shape)
    p.process_raw(np.zeros(raw_shape, raw_dtype))
    raw = np.frombuffer(bytes(int(np.prod(raw_shape)) * raw_dtype.itemsize), raw_dtype).reshape(raw_shape)
    p.process_raw(raw)


def compute(pipeline, task: Task, canon: np.ndarray) -> tuple[np.ndarray, tuple | None]:
    """Records of one task (exactly those serve computes in-process) and, when asked, the pooled map."""
    from .files import to_canonical
    from .service import pool_rdmap
    if task.raw:
        points = pipeline.process_raw(task.data)
    else:
        points = pipeline.process(to_canonical(pipeline.sensor, task.data, canon))
    records = to_records(points, task.seq, task.timestamp_s)
    rdmap = None
    if task.want_rdmap:
        bin_v = pipeline.doppler_fft.bin_hz * pipeline.sensor.wavelength_m / 2.0
        rdmap = pool_rdmap(pipeline.detection_map, pipeline.range_fft.bin_m, bin_v)
    return records, rdmap


# ---- the worker ----------------------------------------------------------------------------------

class Worker:
    """`cubecast worker`: connects to serve's tasks (DEALER) and results (PUSH) endpoints, introduces
    itself, is told the configuration, processes tasks until stopped. Worker(...).run(stop_event)."""

    def __init__(self, tasks_endpoint: str, results_endpoint: str, *, sensor: Sensor | None = None,
                 name: str | None = None, capacity: int = DEFAULT_CAPACITY, heartbeat_s: float = HEARTBEAT_S,
                 log: Callable[[str], None] | None = None, quiet: bool = False,
                 context: zmq.Context | None = None, check_crc: bool = True, keys: ClientKeys | None = None):
        """check_crc=False skips re-computing each frame's CRC-32 (serve checked it on receipt); serve
        starts its local workers so, since over loopback it is ~a quarter of a large frame's time.
        keys: serve's public key and this worker's key pair, for a serve that requires them."""
        if isinstance(capacity, bool) or not isinstance(capacity, int) or not 1 <= capacity <= MAX_CAPACITY:
            raise CubecastError(f"--capacity {capacity!r}: must be a whole number in 1..{MAX_CAPACITY}")
        self.name = name or f"{socket.gethostname()}-{os.getpid()}"
        if not 0 < len(self.name) <= MAX_NAME_CHARS:
            raise CubecastError(f"--name {self.name!r}: must be 1..{MAX_NAME_CHARS} characters")
        self.tasks_endpoint, self.results_endpoint = tasks_endpoint, results_endpoint
        self.expect = sensor
        self.capacity = capacity
        self.heartbeat_s = heartbeat_s
        self.check_crc = check_crc
        self.keys = keys
        self.key = "w" + secrets.token_hex(8)
        self.write = log or _stderr_line
        self.quiet = quiet
        self.context = context
        self.ready = threading.Event()
        self.session: str | None = None
        self.config: WorkerConfig | None = None
        self.pipeline = None
        self._canon: np.ndarray | None = None
        self.tasks_done = 0
        self.tasks_failed = 0
        self.tasks_ignored = 0  # tasks of another session (a serve that has gone)
        self.welcomes = 0
        self._handshake_failures = 0

    def _say(self, text: str) -> None:
        if not self.quiet:
            self.write(f"cubecast worker {self.name}: {text}")

    def _send(self, sock: zmq.Socket, parts: list) -> bool:
        try:
            sock.send_multipart(parts, flags=zmq.NOBLOCK, copy=False)
            return True
        except zmq.Again:  # not connected (IMMEDIATE) or serve does not keep up: retried or dropped
            return False

    def _hello(self, dealer: zmq.Socket) -> bool:
        return self._send(dealer, encode_hello(self.key, self.name, os.getpid(), socket.gethostname()[:255],
                                               self.capacity, self.expect.digest if self.expect else None))

    def _welcome(self, dealer: zmq.Socket, parts: list) -> None:
        session, config = decode_welcome(parts, self.expect.digest if self.expect else None)
        self.welcomes += 1
        t0 = time.perf_counter()
        if not config.same_as(self.config):
            from .chain.pipeline import Pipeline
            self.pipeline = Pipeline(config.sensor, config.settings, config.calibration, config.range_bias_m)
            self._canon = np.empty(self.pipeline.frame_shape, np.complex64)
            warm_up_pipeline(self.pipeline)
            self.config = config
        warm = time.perf_counter() - t0
        self.session = session
        self._send(dealer, encode_ready(self.key, session, config.sensor.digest, warm))
        self.ready.set()
        self._say(f"ready: sensor '{config.sensor.sensor_id}' (digest {config.sensor.digest}), session {session}, "
                  f"warm-up {warm:.2f} s")

    def _task(self, push: zmq.Socket, parts: list) -> None:
        t0 = time.perf_counter()
        task_id = seq = None
        try:
            try:
                session, task_id, seq = task_ids(parts)
                if session != self.session:
                    self.tasks_ignored += 1  # a task of another serve session: nobody waits for it
                    return
            except ProtocolError:
                pass
            task = decode_task(parts, self.config.sensor, self.session, self.check_crc)
            records, rdmap = compute(self.pipeline, task, self._canon)
            error = None
            self.tasks_done += 1
        except CubecastError as exc:
            records, rdmap, error = None, None, str(exc)
            self.tasks_failed += 1
        except Exception as exc:  # one bad frame must not stop the worker
            records, rdmap, error = None, None, f"{type(exc).__name__}: {exc}"
            self.tasks_failed += 1
        if error is not None:
            self._say(f"task failed: {error}")
            if not (isinstance(task_id, int) and isinstance(seq, int)) or isinstance(task_id, bool):
                return  # nothing to answer to; serve counts it lost after its timeout
        stage = dict(self.pipeline.stage_ms) if error is None else {}
        self._send(push, encode_result(self.key, self.session, task_id, seq, records, error, stage,
                                       time.perf_counter() - t0, rdmap))

    def _handshake_failed(self, monitor: zmq.Socket) -> None:
        """Raise CubecastError on a security handshake serve refused or that cannot work; count the
        undecipherable ones (a wrong serve key looks like that) and give up after a few in a row."""
        from zmq.utils.monitor import recv_monitor_message
        while monitor.poll(0):
            ev = recv_monitor_message(monitor)
            if ev["event"] == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self._handshake_failures = 0
                continue
            where = f"serve at {self.tasks_endpoint}"
            if ev["event"] == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                raise CubecastError(f"{where} refused this worker's key: add its public key (the .key file of "
                                    "--key) to serve's --worker-keys folder")
            if self.keys is None:
                raise CubecastError(f"security handshake with {where} failed and this worker has no keys: serve "
                                    "requires them (worker --server-key --key, see `cubecast keys`)")
            self._handshake_failures += 1
            if (ev["event"] == zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                    or self._handshake_failures >= MAX_HANDSHAKE_FAILURES):
                raise CubecastError(f"security handshake with {where} failed: either serve does not use keys "
                                    "(serve and worker must both use them or both not), or --server-key is not "
                                    "serve's public key (the .key file of its --server-key)")

    def run(self, stop: threading.Event | None = None) -> int:
        """Serve tasks until `stop` is set; returns the number of tasks processed. Raises CubecastError
        when serve refuses this worker."""
        from .service import connect_socket
        stop = stop or threading.Event()
        ctx = self.context or zmq.Context()
        dealer = ctx.socket(zmq.DEALER)
        push = ctx.socket(zmq.PUSH)
        try:
            dealer.setsockopt(zmq.ROUTING_ID, self.key.encode())
            dealer.setsockopt(zmq.LINGER, 0)
            dealer.setsockopt(zmq.IMMEDIATE, 1)  # a hello is sent only over a live connection (else retried)
            dealer.setsockopt(zmq.RCVHWM, 4 * MAX_CAPACITY)
            push.setsockopt(zmq.LINGER, 500)
            push.setsockopt(zmq.IMMEDIATE, 1)
            push.setsockopt(zmq.SNDHWM, 4 * MAX_CAPACITY)
            for sock in (dealer, push):  # ZMTP heartbeats: a dead peer's connection is noticed and redialled
                sock.setsockopt(zmq.HEARTBEAT_IVL, 1000)
                sock.setsockopt(zmq.HEARTBEAT_TIMEOUT, 5000)
                if self.keys is not None:
                    self.keys.apply(sock)
            monitor = dealer.get_monitor_socket(HANDSHAKE_FAILED_EVENTS | zmq.EVENT_HANDSHAKE_SUCCEEDED)
            connect_socket(dealer, self.tasks_endpoint, "--connect")
            connect_socket(push, self.results_endpoint, "--results")
            self._say(f"connecting to tasks {self.tasks_endpoint}, results {self.results_endpoint}")
            last_hello = -math.inf
            last_sent = time.monotonic()
            while not stop.is_set():
                now = time.monotonic()
                if self.session is None and now - last_hello >= HELLO_RETRY_S:
                    if self._hello(dealer):
                        last_hello = now
                        last_sent = now
                if self.session is not None and now - last_sent >= self.heartbeat_s:
                    if self._send(dealer, encode_beat(self.key, self.session)):
                        last_sent = now
                if monitor.poll(0):
                    self._handshake_failed(monitor)
                if not dealer.poll(int(self.heartbeat_s * 1000) if self.session else 100, zmq.POLLIN):
                    continue
                for _ in range(4 * MAX_CAPACITY):
                    try:
                        parts = dealer.recv_multipart(zmq.NOBLOCK, copy=False)
                    except zmq.Again:
                        break
                    kind = parts[0].bytes
                    if kind == b"task":
                        if self.session is not None:
                            self._task(push, parts)
                            last_sent = time.monotonic()  # a result also tells serve we are alive
                        else:
                            self.tasks_ignored += 1
                    elif kind == b"welcome":
                        self._welcome(dealer, parts)
                        last_sent = time.monotonic()
                    elif kind == b"who":
                        self._say("serve asks this worker to introduce itself again (serve restarted, or "
                                  "it thought this worker was gone)")
                        self.session = None
                        self.ready.clear()
                        last_hello = -math.inf
                    elif kind == b"refuse":
                        raise CubecastError(f"serve at {self.tasks_endpoint} refused this worker: "
                                            f"{decode_refuse(parts)}")
                    # anything else is ignored: a newer serve may send kinds this worker does not know
                    if stop.is_set():
                        break
        finally:
            with_bye = self.session is not None
            if with_bye:
                self._send(dealer, encode_bye(self.key))
                dealer.setsockopt(zmq.LINGER, 200)
            if "monitor" in locals():
                dealer.disable_monitor()
                monitor.close(linger=0)
            dealer.close()
            push.close(linger=200)
            if self.context is None:
                ctx.term()
        return self.tasks_done


def run_worker(tasks_endpoint: str, results_endpoint: str, sensor_path: str | None = None,
               name: str | None = None, capacity: int = DEFAULT_CAPACITY, quiet: bool = False,
               check_crc: bool = True, server_key: str | None = None, key: str | None = None) -> int:
    """`cubecast worker`: run until SIGINT/SIGTERM; exit code 0 (2 with an error when refused)."""
    from .service import stop_on_signals
    if (server_key is None) != (key is None):
        raise CubecastError("--server-key and --key: give both (serve's public key and this worker's secret "
                            "key) or neither")
    parent = os.environ.get(PARENT_PID_ENV)
    if parent is not None and not _die_with_parent(parent):
        return 0  # a local worker whose serve is already gone
    keys = None
    if key is not None:
        keys = ClientKeys.from_files(server_key, key)
    elif parent is not None and os.environ.get(LOCAL_KEYS_ENV):
        keys = ClientKeys.from_env(os.environ[LOCAL_KEYS_ENV])
    sensor = None
    if sensor_path is not None:
        from .sensor import load_sensor
        sensor = load_sensor(sensor_path)
    stop = threading.Event()
    with stop_on_signals(stop):
        w = Worker(tasks_endpoint, results_endpoint, sensor=sensor, name=name, capacity=capacity, quiet=quiet,
                   check_crc=check_crc, keys=keys)
        done = w.run(stop)
    if not quiet:
        _stderr_line(f"cubecast worker {w.name}: stopped: {done} tasks processed, {w.tasks_failed} failed")
    return 0


# ---- the serve side ------------------------------------------------------------------------------

SENT, DONE, LOST = 0, 1, 2


@dataclass
class Pending:
    """One frame handed to a worker, until it is published or lost."""

    task_id: int
    seq: int
    run: str
    timestamp_s: float
    t_recv: float
    worker: bytes
    t_dispatch: float
    want_rdmap: bool
    state: int = SENT
    result: Result | None = None


@dataclass
class WorkerInfo:
    key: bytes
    name: str
    pid: int
    host: str
    capacity: int
    local_slot: int | None
    state: str = "welcomed"  # welcomed -> ready -> gone
    outstanding: set = field(default_factory=set)
    tasks_done: int = 0
    tasks_lost: int = 0
    last_heard: float = 0.0
    last_dispatch: float = 0.0
    fd: int | None = None
    gone_at: float = 0.0
    gone_reason: str = ""

    @property
    def alive(self) -> bool:
        return self.state == "ready"


@dataclass
class LocalSlot:
    index: int
    proc: subprocess.Popen | None = None
    restarts: int = 0
    restart_at: float = 0.0
    delay_s: float = RESTART_DELAY_S[0]
    started: float = 0.0


PARENT_PID_ENV = "CUBECAST_SERVE_PID"  # set by serve for its local workers


def _die_with_parent(parent_pid: str) -> bool:
    """In a local worker: ask Linux to send SIGTERM when serve dies (no orphans). False if serve is
    gone already (its pid is no longer our parent)."""
    if sys.platform.startswith("linux"):
        try:
            import ctypes
            ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG = 1
        except Exception:
            pass
    return str(os.getppid()) == parent_pid


def local_endpoint(endpoint: str) -> str:
    """Where a process on this host connects to reach a bound endpoint (wildcard hosts -> loopback)."""
    for wild, loop in (("tcp://0.0.0.0:", "tcp://127.0.0.1:"), ("tcp://*:", "tcp://127.0.0.1:"),
                       ("tcp://[::]:", "tcp://[::1]:")):
        if endpoint.startswith(wild):
            return loop + endpoint[len(wild):]
    return endpoint


class WorkerPool:
    """serve's end: binds the tasks ROUTER and results PULL, starts and watches local workers, hands
    frames to workers with free capacity, collects results and returns them in task order.

    Single-threaded: used by serve's processing thread only; `rows` (a snapshot list of per-worker
    dicts) and the counters may be read from other threads."""

    def __init__(self, config: WorkerConfig, tasks_endpoint: str, results_endpoint: str, *, local_workers: int = 0,
                 task_timeout_s: float = DEFAULT_TASK_TIMEOUT_S, reorder_window: int = DEFAULT_REORDER_WINDOW,
                 restart_local: bool = True, log: Callable[[str], None] | None = None, quiet: bool = False,
                 worker_quiet: bool = True, local_check_crc: bool = False, keys: ServerKeys | None = None):
        if isinstance(local_workers, bool) or not isinstance(local_workers, int) or not 0 <= local_workers <= 256:
            raise CubecastError(f"--workers {local_workers!r}: must be a whole number in 0..256")
        if not (task_timeout_s > 0 and math.isfinite(task_timeout_s)):
            raise CubecastError(f"--task-timeout {task_timeout_s!r}: must be a number of seconds > 0")
        self.config = config
        self.tasks_endpoint_requested = tasks_endpoint
        self.results_endpoint_requested = results_endpoint
        self.tasks_endpoint: str | None = None
        self.results_endpoint: str | None = None
        self.task_timeout_s = float(task_timeout_s)
        self.worker_timeout_s = float(task_timeout_s)  # silence (no beat, no result) that counts as gone
        self.reorder_window = max(1, int(reorder_window))
        self.restart_local = restart_local
        self.session = secrets.token_hex(8)
        self.write = log or _stderr_line
        self.quiet = quiet
        self.worker_quiet = worker_quiet
        self.local_check_crc = local_check_crc
        self.keys = keys
        self.handshakes_refused = 0
        self.slots = [LocalSlot(i) for i in range(local_workers)]
        self.workers: dict[bytes, WorkerInfo] = {}
        self.pending: collections.OrderedDict[int, Pending] = collections.OrderedDict()
        self.next_task_id = 0
        self.router = self.pull = self.monitor = None
        self.wake: zmq.Socket | None = None
        self.poller = zmq.Poller()
        self.rows: list[dict] = []
        self.results_discarded = 0  # results of lost tasks, of another session or of unknown workers
        self.results_invalid = 0
        self.workers_refused = 0
        self.messages_invalid = 0
        self._newly_lost: list[Pending] = []
        self._fd_to_key: dict[int, bytes] = {}
        self._dirty = True
        self._welcome_parts = encode_welcome(self.session, config)
        from .service import RateLimitedLog
        self._ignored_log = RateLimitedLog(self.write, 5.0, "cubecast serve: ")

    # ---- set-up and tear-down --------------------------------------------------------------
    def bind(self, ctx: zmq.Context, wake: zmq.Socket | None = None) -> None:
        from .service import bind_socket
        self.router = ctx.socket(zmq.ROUTER)
        self.router.setsockopt(zmq.LINGER, 0)
        self.router.setsockopt(zmq.ROUTER_MANDATORY, 1)  # sending to a vanished worker raises, never drops
        self.router.setsockopt(zmq.ROUTER_HANDOVER, 1)  # a reconnecting worker takes its address back
        self.router.setsockopt(zmq.MAXMSGSIZE, MAX_CONTROL_BYTES + 4096)
        self.router.setsockopt(zmq.SNDHWM, 4 * MAX_CAPACITY)
        self.pull = ctx.socket(zmq.PULL)
        self.pull.setsockopt(zmq.LINGER, 0)
        s = self.config.settings
        max_records = s.max_points * s.angle_max_peaks * RECORD_DTYPE.itemsize
        self.pull.setsockopt(zmq.MAXMSGSIZE, 4 * max_records + (2 << 20))
        if self.keys is not None:
            self.keys.start(ctx)  # the authenticator of this context, before anything can connect
        for sock in (self.router, self.pull):
            sock.setsockopt(zmq.HEARTBEAT_IVL, 1000)
            sock.setsockopt(zmq.HEARTBEAT_TIMEOUT, 5000)
            if self.keys is not None:
                self.keys.apply(sock)
        try:
            # disconnects tell which worker died at once (by the connection's file descriptor);
            # failed handshakes are counted
            self.monitor = self.router.get_monitor_socket(zmq.EVENT_DISCONNECTED | HANDSHAKE_FAILED_EVENTS)
        except zmq.ZMQError:
            self.monitor = None
        self.tasks_endpoint = bind_socket(self.router, self.tasks_endpoint_requested, "--tasks")
        self.results_endpoint = bind_socket(self.pull, self.results_endpoint_requested, "--results")
        self.poller.register(self.router, zmq.POLLIN)
        self.poller.register(self.pull, zmq.POLLIN)
        if self.monitor is not None:
            self.poller.register(self.monitor, zmq.POLLIN)
        if wake is not None:
            self.wake = wake
            self.poller.register(wake, zmq.POLLIN)

    def start_local(self) -> None:
        for slot in self.slots:
            self._spawn(slot)

    def _spawn(self, slot: LocalSlot) -> None:
        cmd = [sys.executable, "-m", "cubecast.daemon.cli", "worker", "--connect", local_endpoint(self.tasks_endpoint),
               "--results", local_endpoint(self.results_endpoint), "--name", f"local-{slot.index}"]
        if not self.local_check_crc:
            cmd.append("--skip-crc")
        if self.worker_quiet:
            cmd.append("--quiet")
        env = dict(os.environ)
        for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
            env.setdefault(var, "1")  # one core per worker process
        env[PARENT_PID_ENV] = str(os.getpid())
        if self.keys is not None:
            env[LOCAL_KEYS_ENV] = self.keys.local.to_env()  # the environment is readable by this user only
        slot.proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, env=env)
        slot.started = time.monotonic()

    def local_pids(self) -> list[int | None]:
        return [s.proc.pid if s.proc is not None and s.proc.poll() is None else None for s in self.slots]

    def wait_ready(self, count: int, timeout_s: float, stop: threading.Event) -> None:
        """Handle handshakes until `count` local workers are ready (raises CubecastError on a timeout or
        when a local worker exits during start-up)."""
        deadline = time.monotonic() + timeout_s
        while not stop.is_set():
            ready = sum(1 for w in self.workers.values() if w.alive and w.local_slot is not None)
            if ready >= count:
                return
            for slot in self.slots:
                if slot.proc is not None and slot.proc.poll() is not None:
                    raise CubecastError(f"local worker local-{slot.index} (pid {slot.proc.pid}) exited with code "
                                        f"{slot.proc.returncode} during start-up")
            if time.monotonic() > deadline:
                raise CubecastError(f"only {ready} of {count} local workers reported ready within {timeout_s:g} s")
            self.poll(100)

    def close(self, deadline_s: float = 0.7) -> None:
        self._ignored_log.flush(force=True)
        procs = [s.proc for s in self.slots if s.proc is not None]
        for p in procs:
            if p.poll() is None:
                p.terminate()
        end = time.monotonic() + deadline_s
        for p in procs:
            try:
                p.wait(max(0.01, end - time.monotonic()))
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()
        if self.monitor is not None:
            try:
                self.router.disable_monitor()
            except zmq.ZMQError:
                pass
            self.monitor.close(linger=0)
        for sock in (self.router, self.pull):
            if sock is not None:
                sock.close(linger=0)
        if self.keys is not None:
            self.keys.stop()

    # ---- dispatch --------------------------------------------------------------------------
    def _pick(self) -> WorkerInfo | None:
        best, best_key = None, None
        for w in self.workers.values():
            if w.alive and len(w.outstanding) < w.capacity:
                key = (len(w.outstanding) / w.capacity, w.last_dispatch)
                if best is None or key < best_key:
                    best, best_key = w, key
        return best

    def can_dispatch(self) -> bool:
        if self.pending and self.next_task_id - next(iter(self.pending)) >= self.reorder_window:
            return False  # the oldest unanswered frame holds the window
        return self._pick() is not None

    def dispatch(self, msg, t_recv: float, want_rdmap: bool) -> bool:
        """Hand one validated `adc` message to the least loaded worker with capacity; False when no
        worker could take it."""
        now = time.monotonic()
        h = msg.header
        received_unix = time.time() - (time.perf_counter() - t_recv)
        while True:
            w = self._pick()
            if w is None:
                return False
            task_id = self.next_task_id
            parts = [w.key] + encode_task(self.session, task_id, h, msg.payload, received_unix, want_rdmap)
            try:
                self.router.send_multipart(parts, flags=zmq.NOBLOCK, copy=False)
            except zmq.ZMQError as exc:  # EHOSTUNREACH (gone) or EAGAIN (its pipe is full): not usable
                self._gone(w, f"cannot send it a task ({exc.strerror})")
                continue
            self.next_task_id += 1
            w.outstanding.add(task_id)
            w.last_dispatch = now
            self.pending[task_id] = Pending(task_id, h["seq"], h["run"], h["timestamp_s"], t_recv, w.key, now,
                                            want_rdmap)
            self._dirty = True
            return True

    # ---- receiving -------------------------------------------------------------------------
    def poll(self, timeout_ms: int) -> tuple[list[Pending], list[Pending]]:
        """Wait up to timeout_ms for messages; handle them and the timeouts. Returns (completed, lost):
        the frames now publishable in task order (each with its result) and those newly lost."""
        events = dict(self.poller.poll(timeout_ms))
        if self.wake is not None and self.wake in events:
            while True:
                try:
                    self.wake.recv(zmq.NOBLOCK)
                except zmq.Again:
                    break
        if self.monitor is not None and self.monitor in events:
            self._monitor_events()
        if self.router in events:
            for _ in range(256):
                try:
                    parts = self.router.recv_multipart(zmq.NOBLOCK, copy=False)
                except zmq.Again:
                    break
                self._control(parts)
        if self.pull in events:
            for _ in range(256):
                try:
                    parts = self.pull.recv_multipart(zmq.NOBLOCK, copy=False)
                except zmq.Again:
                    break
                self._result(parts)
        self._maintain(time.monotonic())
        completed = []
        while self.pending:
            tid, head = next(iter(self.pending.items()))
            if head.state == SENT:
                break
            del self.pending[tid]
            if head.state == DONE:
                completed.append(head)
        lost, self._newly_lost = self._newly_lost, []
        if self._dirty:
            self._refresh_rows()
        return completed, lost

    def _send_to(self, key: bytes, parts: list) -> bool:
        try:
            self.router.send_multipart([key] + parts, flags=zmq.NOBLOCK, copy=False)
            return True
        except zmq.ZMQError:
            return False

    def _monitor_events(self) -> None:
        from zmq.utils.monitor import recv_monitor_message
        while True:
            try:
                ev = recv_monitor_message(self.monitor, zmq.NOBLOCK)
            except zmq.Again:
                break
            if ev["event"] & HANDSHAKE_FAILED_EVENTS:
                self.handshakes_refused += 1
                self._ignored_log("worker handshake", f"refused a worker connection on {self.tasks_endpoint}: "
                                      "unknown key, wrong serve key, or no keys")
            elif ev["event"] == zmq.EVENT_DISCONNECTED:
                key = self._fd_to_key.pop(int(ev["value"]), None)
                w = self.workers.get(key) if key is not None else None
                if w is not None and w.state != "gone":
                    self._gone(w, "its connection closed")

    def _control(self, parts: list) -> None:
        if len(parts) < 3:
            self.messages_invalid += 1
            return
        key, kind = parts[0].bytes, parts[1].bytes
        now = time.monotonic()
        try:
            fd = parts[1].get(zmq.SRCFD)
        except (zmq.ZMQError, AttributeError, ValueError):
            fd = None
        try:
            h = decode_control(key, kind, parts[2])
            if kind == b"hello":
                self._hello(key, h, fd, now)
                return
            w = self.workers.get(key)
            if w is None or w.state == "gone":
                if kind != b"bye":
                    self._send_to(key, encode_who(self.session))
                return
            if fd is not None:
                w.fd = fd
                self._fd_to_key[fd] = key
            w.last_heard = now
            if kind == b"ready":
                if h.get("session") != self.session or h.get("digest") != self.config.sensor.digest:
                    raise ProtocolError(f"ready for session {h.get('session')!r:.40} digest "
                                        f"{h.get('digest')!r:.40}")
                if w.state != "ready":
                    w.state = "ready"
                    self._dirty = True
                    if not self.quiet:
                        where = "local" if w.local_slot is not None else f"on {w.host}"
                        self.write(f"cubecast serve: worker '{w.name}' ({where}, pid {w.pid}) ready, capacity "
                                   f"{w.capacity}")
            elif kind == b"beat":
                if h.get("session") != self.session:
                    self._send_to(key, encode_who(self.session))
            elif kind == b"bye":
                self._gone(w, "it stopped")
        except ProtocolError as exc:
            self.messages_invalid += 1
            if kind == b"hello":  # tell the worker why, so that it stops with that reason
                self.workers_refused += 1
                self._send_to(key, encode_refuse("protocol", str(exc)))
            self._ignored_log("ignored worker message", f"from worker address {key[:20]!r}: {exc}")

    def _hello(self, key: bytes, h: dict, fd: int | None, now: float) -> None:
        hello = decode_hello(h)
        name, pid, host, expect = hello.name, hello.pid, hello.host, hello.expect_digest
        capacity = min(hello.capacity, MAX_CAPACITY)
        s = self.config.sensor
        if expect is not None and expect != s.digest:
            self.workers_refused += 1
            text = (f"serve processes sensor '{s.sensor_id}' with digest {s.digest}; worker '{name}' was started "
                    f"with a sensor description of digest {expect}")
            self._send_to(key, encode_refuse("digest", text))
            self.write(f"cubecast serve: refused worker '{name}' (pid {pid} on {host}): {text}")
            return
        old = self.workers.get(key)
        if old is not None and old.state != "gone":
            if old.state == "welcomed":  # a repeated hello while it warms up: answer again
                self._send_to(key, self._welcome_parts)
                return
            self._gone(old, "it introduced itself again")
        slot = next((sl.index for sl in self.slots if sl.proc is not None and sl.proc.pid == pid
                     and host == socket.gethostname()[:255]), None)
        w = WorkerInfo(key, name, pid, host, capacity, slot, last_heard=now, fd=fd)
        if old is not None:
            w.tasks_done, w.tasks_lost = old.tasks_done, old.tasks_lost
        self.workers[key] = w
        if fd is not None:
            self._fd_to_key[fd] = key
        self._dirty = True
        if not self._send_to(key, self._welcome_parts):
            self._gone(w, "cannot send it the welcome")

    def _result(self, parts: list) -> None:
        try:
            worker, session, res = decode_result(parts)
        except ProtocolError as exc:
            self.results_invalid += 1
            self._ignored_log("ignored worker result", str(exc))
            return
        key = worker.encode()
        w = self.workers.get(key)
        entry = self.pending.get(res.task_id)
        if session != self.session or w is None or entry is None or entry.state != SENT or entry.worker != key:
            self.results_discarded += 1  # late (the task was counted lost) or from another serve session
            return
        if res.seq != entry.seq:
            self.results_invalid += 1
            self.write(f"cubecast serve: worker '{w.name}' answered task {res.task_id} with seq {res.seq}; the task "
                       f"was frame {entry.seq}; counted as lost")
            self._lose(entry)
            return
        w.last_heard = time.monotonic()
        w.outstanding.discard(res.task_id)
        w.tasks_done += 1
        entry.state, entry.result = DONE, res
        self._dirty = True

    # ---- failures ----------------------------------------------------------------------------
    def _lose(self, entry: Pending) -> None:
        if entry.state != SENT:
            return
        entry.state = LOST
        self._newly_lost.append(entry)
        w = self.workers.get(entry.worker)
        if w is not None:
            w.outstanding.discard(entry.task_id)
            w.tasks_lost += 1
        self._dirty = True

    def _gone(self, w: WorkerInfo, reason: str) -> None:
        if w.state == "gone":
            return
        held = sorted(w.outstanding)
        w.state, w.gone_at, w.gone_reason = "gone", time.monotonic(), reason
        for tid in held:
            entry = self.pending.get(tid)
            if entry is not None:
                self._lose(entry)
        w.outstanding.clear()
        if w.fd is not None and self._fd_to_key.get(w.fd) == w.key:
            del self._fd_to_key[w.fd]
        self._dirty = True
        self.write(f"cubecast serve: worker '{w.name}' (pid {w.pid} on {w.host}) is gone: {reason}; "
                   f"{len(held)} frame(s) it held counted as lost")

    def _maintain(self, now: float) -> None:
        for slot in self.slots:
            p = slot.proc
            if p is not None and p.poll() is not None:
                for w in self.workers.values():
                    if w.local_slot == slot.index and w.pid == p.pid and w.state != "gone":
                        self._gone(w, f"its process exited with code {p.returncode}")
                slot.proc = None
                if self.restart_local:
                    if now - slot.started > 60.0:
                        slot.delay_s = RESTART_DELAY_S[0]  # it ran a good while: not a crash loop
                    slot.restart_at = now + slot.delay_s
                    slot.delay_s = min(2 * slot.delay_s, RESTART_DELAY_S[1])
            elif p is None and self.restart_local and now >= slot.restart_at:
                slot.restarts += 1
                self._spawn(slot)
                self.write(f"cubecast serve: restarting local worker local-{slot.index} (restart {slot.restarts})")
        for w in list(self.workers.values()):
            if w.state == "ready" and now - w.last_heard > self.worker_timeout_s:
                self._gone(w, f"silent for more than {self.worker_timeout_s:g} s")
            elif w.state == "gone" and now - w.gone_at > 300.0:
                del self.workers[w.key]  # forget long-gone workers
                self._dirty = True
        for entry in self.pending.values():  # dispatch order: the oldest first
            if entry.state == SENT:
                if now - entry.t_dispatch <= self.task_timeout_s:
                    break
                w = self.workers.get(entry.worker)
                self._lose(entry)
                if w is not None:
                    self.write(f"cubecast serve: worker '{w.name}' did not answer frame {entry.seq} within "
                               f"{self.task_timeout_s:g} s; counted as lost")

    # ---- reporting -----------------------------------------------------------------------------
    def _refresh_rows(self) -> None:
        self.rows = [{"name": w.name, "pid": w.pid, "host": w.host, "local": w.local_slot is not None,
                      "alive": w.alive, "tasks_done": w.tasks_done, "tasks_lost": w.tasks_lost,
                      "outstanding": len(w.outstanding), "capacity": w.capacity}
                     for w in list(self.workers.values())[:128]]
        self._dirty = False

    def counters(self) -> dict:
        return {"workers_alive": sum(1 for r in self.rows if r["alive"]), "workers_refused": self.workers_refused,
                "worker_results_discarded": self.results_discarded, "worker_results_invalid": self.results_invalid,
                "worker_messages_invalid": self.messages_invalid,
                "worker_handshakes_refused": self.handshakes_refused}
