"""`cubecast worker`: processes frames for a serve on this or another host.

A worker connects to serve (never the reverse), so a worker on another host needs nothing but the
two endpoints, and workers can come and go while serve runs:

    serve BINDs  a ROUTER on the tasks endpoint    <-  each worker CONNECTs a DEALER
    serve BINDs  a PULL   on the results endpoint  <-  each worker CONNECTs a PUSH

The worker introduces itself (hello), is told the whole configuration (welcome: sensor description,
processing settings, calibration; daemon/workproto.py), builds its Pipeline, warms it up and says
ready; then it processes tasks until stopped, sending a heartbeat when idle. The records of a task
are exactly those serve computes in-process. A settings change (live tuning) arrives as `prepare`:
the new chain is built in a thread while tasks go on with the running one, the worker answers
`prepared` (or the error that stopped the build) and switches only on serve's `commit`, which comes
after the last task of the old settings (workproto.py, "Settings epochs"). A worker that serve no
longer knows (serve restarted, or thought it gone) is asked to introduce itself again; a refused
worker stops with serve's reason.

Local workers (started by serve) skip the CRC re-check: serve checked it on receipt, and over
loopback for a large frame it costs a quarter of the chain's time. They die with their serve.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import os
import secrets
import socket
import threading
import time

import numpy as np
import zmq
from zmq.utils.monitor import recv_monitor_message

from .chain.pipeline import Pipeline
from .chain.points import to_records
from .errors import CubecastError
from .files import to_canonical
from .keys import HANDSHAKE_FAILED_EVENTS, LOCAL_KEYS_ENV, ClientKeys
from .logs import RateLimitFilter, log_limited
from .netio import PARENT_PID_ENV, connect_socket, die_with_parent, stop_on_signals
from .sensor import Sensor, load_sensor
from .workproto import (HEARTBEAT_S, MAX_CAPACITY, MAX_NAME_CHARS, ProtocolError, Task, WorkerConfig, decode_epoch,
                        decode_prepare, decode_refuse, decode_task, decode_welcome, encode_beat, encode_bye,
                        encode_hello, encode_prepared, encode_ready, encode_result, task_ids)

log = logging.getLogger(__name__)

DEFAULT_CAPACITY = 2  # tasks a worker holds: one being processed, one waiting
HELLO_RETRY_S = 1.0
MAX_HANDSHAKE_FAILURES = 3  # undecipherable handshakes in a row before a worker gives up
BUILDING_POLL_S = 0.02  # while a chain is built aside: how often the loop looks whether it is done


class _Prepared:
    """A chain for another settings epoch, built in a thread (pipeline or error set when done)."""

    def __init__(self, epoch: int, config: WorkerConfig):
        self.epoch, self.config = epoch, config
        self.pipeline: Pipeline | None = None
        self.error: str | None = None
        self.warm_up_s = 0.0
        self.answered = False
        self.thread: threading.Thread | None = None

    @property
    def done(self) -> bool:
        return self.thread is not None and not self.thread.is_alive()


def compute(pipeline: Pipeline, task: Task, canon: np.ndarray) -> tuple[np.ndarray, tuple | None]:
    """Records of one task (exactly those serve computes in-process) and, when asked, the pooled map."""
    if task.raw:
        points = pipeline.process_raw(task.data)
    else:
        points = pipeline.process(to_canonical(pipeline.sensor, task.data, canon))
    records = to_records(points, task.seq, task.timestamp_s)
    return records, (pipeline.display_map() if task.want_rdmap else None)


class Worker:
    """`cubecast worker`: connects to serve's tasks (DEALER) and results (PUSH) endpoints, introduces
    itself, is told the configuration, processes tasks until stopped. Worker(...).run(stop_event)."""

    def __init__(self, tasks_endpoint: str, results_endpoint: str, *, sensor: Sensor | None = None,
                 name: str | None = None, capacity: int = DEFAULT_CAPACITY, heartbeat_s: float = HEARTBEAT_S,
                 context: zmq.Context | None = None, check_crc: bool = True, keys: ClientKeys | None = None,
                 log_interval_s: float = 5.0):
        """check_crc=False skips re-computing each frame's CRC-32 (serve checked it on receipt); serve
        starts its local workers so, since over loopback it is ~a quarter of a large frame's time.
        keys: serve's public key and this worker's key pair, for a serve that requires them. Failed
        tasks are logged at most once per log_interval_s."""
        if isinstance(capacity, bool) or not isinstance(capacity, int) or not 1 <= capacity <= MAX_CAPACITY:
            raise CubecastError(f"worker capacity {capacity!r}: must be a whole number in 1..{MAX_CAPACITY}")
        self.name = name or f"{socket.gethostname()}-{os.getpid()}"
        if not 0 < len(self.name) <= MAX_NAME_CHARS:
            raise CubecastError(f"worker name {self.name!r}: must be 1..{MAX_NAME_CHARS} characters")
        self.tasks_endpoint, self.results_endpoint = tasks_endpoint, results_endpoint
        self.expect = sensor
        self.capacity = capacity
        self.heartbeat_s = heartbeat_s
        self.check_crc = check_crc
        self.keys = keys
        self.key = "w" + secrets.token_hex(8)
        self._failed_log = RateLimitFilter(log_interval_s)
        self.context = context
        self.ready = threading.Event()
        self.session: str | None = None
        self.config: WorkerConfig | None = None
        self.pipeline = None
        self.epoch = 0  # the settings epoch of self.pipeline
        self._prepared: _Prepared | None = None
        self._canon: np.ndarray | None = None
        self.tasks_done = 0
        self.tasks_failed = 0
        self.tasks_ignored = 0  # tasks of another session (a serve that has gone)
        self.welcomes = 0
        self.changes = 0  # settings changes committed
        self._handshake_failures = 0

    def _say(self, text: str) -> None:
        log.info("cubecast worker %s: %s", self.name, text)

    def _send(self, sock: zmq.Socket, parts: list) -> bool:
        try:
            sock.send_multipart(parts, flags=zmq.NOBLOCK, copy=False)
            return True
        except zmq.Again:  # not connected (IMMEDIATE) or serve does not keep up: retried or dropped
            return False

    def _hello(self, dealer: zmq.Socket) -> bool:
        return self._send(dealer, encode_hello(self.key, self.name, os.getpid(), socket.gethostname()[:255],
                                               self.capacity, self.expect.digest if self.expect else None))

    def build_pipeline(self, config: WorkerConfig) -> Pipeline:
        """The warmed-up chain of a configuration (raises CubecastError for settings it cannot take)."""
        pipeline = Pipeline(config.sensor, config.settings, config.calibration, config.range_bias_m,
                            config.iq_imbalance)
        pipeline.warm_up()
        return pipeline

    def _welcome(self, dealer: zmq.Socket, parts: list) -> None:
        session, config = decode_welcome(parts, self.expect.digest if self.expect else None)
        self.welcomes += 1
        self._prepared = None  # a welcome states the whole configuration: a change being built is moot
        t0 = time.perf_counter()
        if not config.same_as(self.config):
            self.pipeline = self.build_pipeline(config)
            self._canon = np.empty(self.pipeline.frame_shape, np.complex64)
        self.config, self.epoch = config, config.epoch
        warm = time.perf_counter() - t0
        self.session = session
        self._send(dealer, encode_ready(self.key, session, config.sensor.digest, warm, self.epoch))
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
            if task.epoch != self.epoch:
                raise ProtocolError(f"task {task.task_id} is of settings epoch {task.epoch}; this worker runs epoch "
                                    f"{self.epoch}")
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
            log_limited(log, self._failed_log, logging.WARNING, "task failed", "cubecast worker %s: task failed: %s",
                        self.name, error)
            if not (isinstance(task_id, int) and isinstance(seq, int)) or isinstance(task_id, bool):
                return  # nothing to answer to; serve counts it lost after its timeout
        stage = dict(self.pipeline.stage_ms) if error is None else {}
        frontend = self.pipeline.frontend if error is None else None  # packed into the message at once
        self._send(push, encode_result(self.key, self.session, task_id, seq, records, error, stage,
                                       time.perf_counter() - t0, rdmap, self.epoch, frontend))

    # ---- live settings changes ----------------------------------------------------------------
    def _prepare(self, parts: list) -> None:
        """Build the chain of a `prepare` in a thread; tasks go on with the running one meanwhile."""
        epoch, settings = decode_prepare(parts, self.session)
        prep = _Prepared(epoch, dataclasses.replace(self.config, settings=settings, epoch=epoch))
        self._prepared = prep  # a newer prepare replaces one still being built (its result is dropped)

        def build() -> None:
            t0 = time.perf_counter()
            try:
                prep.pipeline = self.build_pipeline(prep.config)
            except CubecastError as exc:
                prep.error = str(exc)
            except Exception as exc:  # whatever stops the build is the refusal's reason
                prep.error = f"{type(exc).__name__}: {exc}"
            prep.warm_up_s = time.perf_counter() - t0

        prep.thread = threading.Thread(target=build, name=f"cubecast-worker-prepare-{epoch}", daemon=True)
        prep.thread.start()
        self._say(f"building the chain of settings epoch {epoch} aside")

    def _answer_prepared(self, dealer: zmq.Socket) -> bool:
        """Once the chain being built is done: tell serve (ready, or the error). True when sent."""
        prep = self._prepared
        if prep is None or prep.answered or not prep.done:
            return False
        if not self._send(dealer, encode_prepared(self.key, self.session, prep.epoch, prep.error, prep.warm_up_s)):
            return False  # not connected now: tried again on the next pass
        prep.answered = True
        if prep.error is not None:
            log.warning("cubecast worker %s: cannot build the chain of settings epoch %d: %s", self.name, prep.epoch,
                        prep.error)
            self._prepared = None
        return True

    def _commit(self, parts: list) -> bool:
        """Switch to the prepared chain; False when this worker has no such chain (out of step)."""
        epoch = decode_epoch(parts, "commit", self.session)
        prep = self._prepared
        if prep is None or prep.epoch != epoch or prep.pipeline is None:
            log.warning("cubecast worker %s: serve committed settings epoch %d, which this worker has not built; "
                        "introducing itself again", self.name, epoch)
            return False
        self.pipeline, self.config, self.epoch = prep.pipeline, prep.config, epoch
        if self._canon is None or self._canon.shape != self.pipeline.frame_shape:
            self._canon = np.empty(self.pipeline.frame_shape, np.complex64)
        self._prepared = None
        self.changes += 1
        self._say(f"now running settings epoch {epoch}")
        return True

    def _abort(self, parts: list) -> None:
        epoch = decode_epoch(parts, "abort", self.session)
        if self._prepared is not None and self._prepared.epoch == epoch:
            self._prepared = None
            self._say(f"settings epoch {epoch} dropped (serve keeps the running settings)")

    def _handshake_failed(self, monitor: zmq.Socket) -> None:
        """Raise CubecastError on a security handshake serve refused or that cannot work; count the
        undecipherable ones (a wrong serve key looks like that) and give up after a few in a row."""
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
            connect_socket(dealer, self.tasks_endpoint, "serve's tasks endpoint")
            connect_socket(push, self.results_endpoint, "serve's results endpoint")
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
                self._failed_log.flush(log, prefix=f"cubecast worker {self.name}: ")
                if self.session is not None and self._answer_prepared(dealer):
                    last_sent = time.monotonic()
                wait_s = self.heartbeat_s if self.session else 0.1
                if self._prepared is not None and not self._prepared.answered:
                    wait_s = min(wait_s, BUILDING_POLL_S)
                if not dealer.poll(int(wait_s * 1000), zmq.POLLIN):
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
                    elif kind in (b"prepare", b"commit", b"abort") and self.session is not None:
                        try:
                            if kind == b"prepare":
                                self._prepare(parts)
                            elif kind == b"abort":
                                self._abort(parts)
                            elif not self._commit(parts):
                                self.session, self._prepared = None, None
                                self.ready.clear()
                                last_hello = -math.inf
                        except ProtocolError as exc:
                            log_limited(log, self._failed_log, logging.WARNING, "settings message",
                                        "cubecast worker %s: ignored %s from serve: %s", self.name,
                                        kind.decode(), exc)
                    elif kind == b"who":
                        self._say("serve asks this worker to introduce itself again (serve restarted, or "
                                  "it thought this worker was gone)")
                        self.session = None
                        self._prepared = None
                        self.ready.clear()
                        last_hello = -math.inf
                    elif kind == b"refuse":
                        raise CubecastError(f"serve at {self.tasks_endpoint} refused this worker: "
                                            f"{decode_refuse(parts)}")
                    # anything else is ignored: a newer serve may send kinds this worker does not know
                    if stop.is_set():
                        break
        finally:
            self._failed_log.flush(log, force=True, prefix=f"cubecast worker {self.name}: ")
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
               name: str | None = None, capacity: int = DEFAULT_CAPACITY, check_crc: bool = True,
               server_key: str | None = None, key: str | None = None) -> int:
    """`cubecast worker`: run until SIGINT/SIGTERM; exit code 0 (2 with an error when refused)."""
    if (server_key is None) != (key is None):
        raise CubecastError("serve's public key and this worker's secret key: give both or neither")
    parent = os.environ.get(PARENT_PID_ENV)
    if parent is not None and not die_with_parent(parent):
        return 0  # a local worker whose serve is already gone
    keys = None
    if key is not None:
        keys = ClientKeys.from_files(server_key, key)
    elif parent is not None and os.environ.get(LOCAL_KEYS_ENV):
        keys = ClientKeys.from_env(os.environ[LOCAL_KEYS_ENV])
    sensor = None
    if sensor_path is not None:
        sensor = load_sensor(sensor_path)
    stop = threading.Event()
    with stop_on_signals(stop):
        w = Worker(tasks_endpoint, results_endpoint, sensor=sensor, name=name, capacity=capacity,
                   check_crc=check_crc, keys=keys)
        done = w.run(stop)
    log.info("cubecast worker %s: stopped: %d tasks processed, %d failed", w.name, done, w.tasks_failed)
    return 0
