"""serve's end of the workers: `serve --workers N` and workers on other hosts (`cubecast worker`).

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

The messages are those of daemon/workproto.py; the worker's side is daemon/worker.py. Handshake:
a worker says hello; serve answers welcome with the whole configuration, or refuses it (a worker
started with another sensor description); the worker builds and warms up its Pipeline and says
ready; only then does serve count its capacity. A task carries the ADC payload exactly as received
from the source (zero-copy).

Live settings changes (daemon/retune.py asks; workproto.py "Settings epochs" has the protocol):
begin_change sends `prepare` to every ready worker (and to a worker that becomes ready while the
change is pending); change_state says whether all have answered, whether one refused (its reason),
or whether time ran out; commit_change switches serve to the new epoch (tasks from then on carry it,
`commit` goes to the workers, the welcome of later workers carries the new settings) and
abort_change sends `abort` (nobody switches). Results carry the epoch of their task; one that does
not is counted invalid and its frame lost.

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
import logging
import math
import os
import secrets
import socket
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field, replace

import zmq
from zmq.utils.monitor import recv_monitor_message

from .chain.points import RECORD_DTYPE
from .errors import CubecastError
from .keys import HANDSHAKE_FAILED_EVENTS, LOCAL_KEYS_ENV, ServerKeys
from .logs import RateLimitFilter, log_limited, uses_json_lines
from .netio import PARENT_PID_ENV, bind_socket, local_endpoint
from .settings import ProcessingSettings
from .workproto import (MAX_CAPACITY, MAX_CONTROL_BYTES, ProtocolError, Result, WorkerConfig, decode_control,
                        decode_hello, decode_prepared, decode_result, encode_abort, encode_commit, encode_prepare,
                        encode_refuse, encode_task, encode_welcome, encode_who)

log = logging.getLogger(__name__)

DEFAULT_TASK_TIMEOUT_S = 2.0
DEFAULT_REORDER_WINDOW = 64
STARTUP_TIMEOUT_S = 120.0  # local workers: numba loads from the cache serve filled, but a loaded host is slow
RESTART_DELAY_S = (1.0, 30.0)  # local worker restarts: first delay, doubling up to the second
STOPPED = "it stopped"  # a worker's clean exit (bye)
CHANGE_TIMEOUT_S = 60.0  # a settings change every worker has not answered within this is refused
RESULT_MARGIN_BYTES = 2 << 20  # the results socket's message limit: 4 x the records of the settings, plus this

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
    epoch: int = 0  # the settings epoch it was dispatched in


@dataclass
class WorkerInfo:
    key: bytes
    name: str
    pid: int
    host: str
    capacity: int
    local_slot: int | None
    live_settings: bool = False  # it follows prepare / commit / abort
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
class LiveChange:
    """A settings change sent to the workers, until committed or aborted."""

    epoch: int
    config: WorkerConfig
    started: float
    timeout_s: float
    asked: set = field(default_factory=set)  # worker keys sent the prepare
    waiting: set = field(default_factory=set)  # asked and not answered yet
    refusals: list = field(default_factory=list)


@dataclass
class LocalSlot:
    index: int
    proc: subprocess.Popen | None = None
    restarts: int = 0
    restart_at: float = 0.0
    delay_s: float = RESTART_DELAY_S[0]
    started: float = 0.0


class WorkerPool:
    """serve's end: binds the tasks ROUTER and results PULL, starts and watches local workers, hands
    frames to workers with free capacity, collects results and returns them in task order.

    Single-threaded: used by serve's processing thread only; `rows` (a snapshot list of per-worker
    dicts) and the counters may be read from other threads."""

    def __init__(self, config: WorkerConfig, tasks_endpoint: str, results_endpoint: str, *, local_workers: int = 0,
                 task_timeout_s: float = DEFAULT_TASK_TIMEOUT_S, reorder_window: int = DEFAULT_REORDER_WINDOW,
                 restart_local: bool = True, local_check_crc: bool = False, keys: ServerKeys | None = None,
                 log_interval_s: float = 5.0):
        """Local workers log warnings and errors only (to serve's standard error). Ignored worker
        messages are logged at most once per reason per log_interval_s."""
        if isinstance(local_workers, bool) or not isinstance(local_workers, int) or not 0 <= local_workers <= 256:
            raise CubecastError(f"local workers {local_workers!r}: must be a whole number in 0..256")
        if not (task_timeout_s > 0 and math.isfinite(task_timeout_s)):
            raise CubecastError(f"task timeout {task_timeout_s!r}: must be a number of seconds > 0")
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
        self._ignored_log = RateLimitFilter(log_interval_s)
        self.epoch = config.epoch  # the settings epoch tasks are dispatched in
        self.change: LiveChange | None = None
        self.max_result_bytes = 0  # set by bind

    # ---- set-up and tear-down --------------------------------------------------------------
    def bind(self, ctx: zmq.Context, wake: zmq.Socket | None = None) -> None:
        self.router = ctx.socket(zmq.ROUTER)
        self.router.setsockopt(zmq.LINGER, 0)
        self.router.setsockopt(zmq.ROUTER_MANDATORY, 1)  # sending to a vanished worker raises, never drops
        self.router.setsockopt(zmq.ROUTER_HANDOVER, 1)  # a reconnecting worker takes its address back
        self.router.setsockopt(zmq.MAXMSGSIZE, MAX_CONTROL_BYTES + 4096)
        self.router.setsockopt(zmq.SNDHWM, 4 * MAX_CAPACITY)
        self.pull = ctx.socket(zmq.PULL)
        self.pull.setsockopt(zmq.LINGER, 0)
        self.max_result_bytes = 4 * self.result_bytes(self.config.settings) + RESULT_MARGIN_BYTES
        self.pull.setsockopt(zmq.MAXMSGSIZE, self.max_result_bytes)
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
        self.tasks_endpoint = bind_socket(self.router, self.tasks_endpoint_requested, "tasks endpoint")
        self.results_endpoint = bind_socket(self.pull, self.results_endpoint_requested, "results endpoint")
        self.poller.register(self.router, zmq.POLLIN)
        self.poller.register(self.pull, zmq.POLLIN)
        if self.monitor is not None:
            self.poller.register(self.monitor, zmq.POLLIN)
        if wake is not None:
            self.wake = wake
            self.poller.register(wake, zmq.POLLIN)

    @staticmethod
    def result_bytes(settings: ProcessingSettings) -> int:
        """The largest records payload of one result under these settings."""
        return settings.max_points * settings.angle_max_peaks * RECORD_DTYPE.itemsize

    def start_local(self) -> None:
        for slot in self.slots:
            self._spawn(slot)

    def _spawn(self, slot: LocalSlot) -> None:
        cmd = [sys.executable, "-m", "cubecast.daemon.cli", "worker", "--connect", local_endpoint(self.tasks_endpoint),
               "--results", local_endpoint(self.results_endpoint), "--name", f"local-{slot.index}"]
        if not self.local_check_crc:
            cmd.append("--skip-crc")
        cmd.append("--quiet")  # warnings and errors only
        if uses_json_lines():
            cmd.append("--log-json")  # serve logs for a collector: so do its workers
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
        self._ignored_log.flush(log, force=True, prefix="cubecast serve: ")
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
            parts = [w.key] + encode_task(self.session, task_id, h, msg.payload, received_unix, want_rdmap,
                                          self.epoch)
            try:
                self.router.send_multipart(parts, flags=zmq.NOBLOCK, copy=False)
            except zmq.ZMQError as exc:  # EHOSTUNREACH (gone) or EAGAIN (its pipe is full): not usable
                self._gone(w, f"cannot send it a task ({exc.strerror})")
                continue
            self.next_task_id += 1
            w.outstanding.add(task_id)
            w.last_dispatch = now
            self.pending[task_id] = Pending(task_id, h["seq"], h["run"], h["timestamp_s"], t_recv, w.key, now,
                                            want_rdmap, epoch=self.epoch)
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

    def _ignored(self, reason: str, text: str) -> None:
        log_limited(log, self._ignored_log, logging.WARNING, reason, "cubecast serve: %s: %s", reason, text)

    def _send_to(self, key: bytes, parts: list) -> bool:
        try:
            self.router.send_multipart([key] + parts, flags=zmq.NOBLOCK, copy=False)
            return True
        except zmq.ZMQError:
            return False

    def _monitor_events(self) -> None:
        while True:
            try:
                ev = recv_monitor_message(self.monitor, zmq.NOBLOCK)
            except zmq.Again:
                break
            if ev["event"] & HANDSHAKE_FAILED_EVENTS:
                self.handshakes_refused += 1
                self._ignored("worker handshake", f"refused a worker connection on {self.tasks_endpoint}: "
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
                if h.get("epoch", 0) != self.epoch and w.state != "ready":
                    # welcomed before a settings change was committed: the welcome of now
                    log.info("cubecast serve: worker '%s' is ready for settings epoch %r; sending it epoch %d",
                             w.name, h.get("epoch"), self.epoch)
                    if not self._send_to(key, self._welcome_parts):
                        self._gone(w, "cannot send it the welcome")
                    return
                if w.state != "ready":
                    w.state = "ready"
                    self._dirty = True
                    where = "local" if w.local_slot is not None else f"on {w.host}"
                    log.info("cubecast serve: worker '%s' (%s, pid %d) ready, capacity %d", w.name, where, w.pid,
                             w.capacity)
                    if self.change is not None:
                        self._ask(w)
            elif kind == b"prepared":
                self._prepared(w, decode_prepared(h))
            elif kind == b"beat":
                if h.get("session") != self.session:
                    self._send_to(key, encode_who(self.session))
            elif kind == b"bye":
                self._gone(w, STOPPED)
        except ProtocolError as exc:
            self.messages_invalid += 1
            if kind == b"hello":  # tell the worker why, so that it stops with that reason
                self.workers_refused += 1
                self._send_to(key, encode_refuse("protocol", str(exc)))
            self._ignored("ignored worker message", f"from worker address {key[:20]!r}: {exc}")

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
            log.warning("cubecast serve: refused worker '%s' (pid %d on %s): %s", name, pid, host, text)
            return
        old = self.workers.get(key)
        if old is not None and old.state != "gone":
            if old.state == "welcomed":  # a repeated hello while it warms up: answer again
                self._send_to(key, self._welcome_parts)
                return
            self._gone(old, "it introduced itself again")
        slot = next((sl.index for sl in self.slots if sl.proc is not None and sl.proc.pid == pid
                     and host == socket.gethostname()[:255]), None)
        w = WorkerInfo(key, name, pid, host, capacity, slot, hello.live_settings, last_heard=now, fd=fd)
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
            self._ignored("ignored worker result", str(exc))
            return
        key = worker.encode()
        w = self.workers.get(key)
        entry = self.pending.get(res.task_id)
        if session != self.session or w is None or entry is None or entry.state != SENT or entry.worker != key:
            self.results_discarded += 1  # late (the task was counted lost) or from another serve session
            return
        n_rx = self.config.sensor.n_rx
        if res.frontend is not None and res.frontend.shape[0] != n_rx:
            self.results_invalid += 1
            log.warning("cubecast serve: worker '%s' answered task %d with front-end records of %d channels; sensor "
                        "'%s' has %d; counted as lost", w.name, res.task_id, res.frontend.shape[0],
                        self.config.sensor.sensor_id, n_rx)
            self._lose(entry)
            return
        if res.seq != entry.seq or res.epoch != entry.epoch:
            self.results_invalid += 1
            log.warning("cubecast serve: worker '%s' answered task %d with seq %d of settings epoch %d; the task was "
                        "frame %d of epoch %d; counted as lost", w.name, res.task_id, res.seq, res.epoch, entry.seq,
                        entry.epoch)
            self._lose(entry)
            return
        w.last_heard = time.monotonic()
        w.outstanding.discard(res.task_id)
        w.tasks_done += 1
        entry.state, entry.result = DONE, res
        self._dirty = True

    # ---- live settings changes ------------------------------------------------------------------
    def begin_change(self, epoch: int, settings: ProcessingSettings, timeout_s: float = CHANGE_TIMEOUT_S) -> None:
        """Send `prepare` for these settings to every ready worker (serve built them already, so they
        are valid for the sensor); poll change_state() until it is not 'pending'."""
        self.change = LiveChange(epoch, replace(self.config, settings=settings, epoch=epoch), time.monotonic(),
                                 timeout_s)
        for w in list(self.workers.values()):
            if w.alive:
                self._ask(w)

    def _ask(self, w: WorkerInfo) -> None:
        c = self.change
        where = "local" if w.local_slot is not None else f"on {w.host}"
        if not w.live_settings:
            c.refusals.append(f"worker '{w.name}' ({where}) is a cubecast that cannot change settings while it runs; "
                              "restart it with the version serve runs")
        elif self._send_to(w.key, encode_prepare(self.session, c.epoch, c.config.settings)):
            c.asked.add(w.key)
            c.waiting.add(w.key)
        else:
            self._gone(w, "cannot send it the settings change")

    def _prepared(self, w: WorkerInfo, h) -> None:
        c = self.change
        if c is None or h.session != self.session or h.epoch != c.epoch or w.key not in c.waiting:
            return  # the answer to a change that was aborted or is done
        c.waiting.discard(w.key)
        if h.error is not None:
            where = "local" if w.local_slot is not None else f"on {w.host}"
            c.refusals.append(f"worker '{w.name}' ({where}) cannot build the chain: {h.error}")

    def change_state(self, now: float | None = None) -> tuple[str, str]:
        """('pending', ''), ('ready', '') or ('refused', reason) of the change begun."""
        c = self.change
        now = time.monotonic() if now is None else now
        c.waiting = {k for k in c.waiting if k in self.workers and self.workers[k].alive}  # the gone need not answer
        if c.refusals:
            return "refused", "; ".join(c.refusals)
        if not c.waiting:
            return "ready", ""
        if now - c.started > c.timeout_s:
            names = ", ".join(sorted(f"'{self.workers[k].name}'" for k in c.waiting))
            return "refused", f"worker {names} did not answer the settings change within {c.timeout_s:g} s"
        return "pending", ""

    def commit_change(self) -> None:
        """From now on tasks carry the new epoch; every worker asked switches (after its old tasks)."""
        c, self.change = self.change, None
        self.config, self.epoch = c.config, c.epoch
        self._welcome_parts = encode_welcome(self.session, self.config)
        for key in sorted(c.asked):
            w = self.workers.get(key)
            if w is not None and w.alive and not self._send_to(key, encode_commit(self.session, c.epoch)):
                self._gone(w, "cannot send it the settings commit")

    def abort_change(self) -> None:
        """Every worker asked drops what it built; the running epoch goes on."""
        c, self.change = self.change, None
        if c is None:
            return
        for key in sorted(c.asked):
            w = self.workers.get(key)
            if w is not None and w.alive:
                self._send_to(key, encode_abort(self.session, c.epoch))

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
        log.log(logging.INFO if reason == STOPPED else logging.WARNING,
                "cubecast serve: worker '%s' (pid %d on %s) is gone: %s; %d frame(s) it held counted as lost",
                w.name, w.pid, w.host, reason, len(held))

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
                log.warning("cubecast serve: restarting local worker local-%d (restart %d)", slot.index, slot.restarts)
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
                    log.warning("cubecast serve: worker '%s' did not answer frame %d within %g s; counted as lost",
                                w.name, entry.seq, self.task_timeout_s)
        self._ignored_log.flush(log, prefix="cubecast serve: ")

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
