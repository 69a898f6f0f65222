"""Where serve runs the chain: in its own processing thread (LocalProcessor) or in worker processes
(PoolProcessor, daemon/pool.py). Both offer the small interface serve's loop calls:

    start(ctx, stop)             warm up (with workers: bind, start local workers, wait until ready)
    wake()                       from the receiver thread: a frame was queued
    has_capacity()               can a frame be submitted now?
    submit(msg, t_recv, map)     hand over one validated `adc` message; False if nobody could take it
    collect(timeout_s)           the finished frames in frame order (waits up to timeout_s for any)
    stage_ms, counters(), health_fields, describe(), close()
    prepare(settings, epoch)     a settings change made ready aside (a Change; the running chain goes on)
    commit(change), abort(change)  from the processing thread, between frames, once change.poll() says

A Change is polled from the processing thread: 'building' until its chain is ready everywhere it
runs ('ready') or something refused it ('refused', change.reason). Nothing switches before commit.

A finished frame is an Outcome: its point records (and, when asked, a way to the pooled display
map), a processing error, or lost with a worker. serve does all the counting under its one lock.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np
import zmq

from .chain.pipeline import Pipeline
from .chain.points import RECORD_DTYPE, to_records
from .files import to_canonical
from .keys import ServerKeys
from .errors import CubecastError
from .pool import CHANGE_TIMEOUT_S, DEFAULT_TASK_TIMEOUT_S, STARTUP_TIMEOUT_S, WorkerPool
from .sensor import Sensor
from .settings import ProcessingSettings
from .wire import Message
from .workproto import WorkerConfig


@dataclass
class Outcome:
    """One frame done with: published (records), failed (error) or lost with a worker (lost)."""

    seq: int
    run: str
    timestamp_s: float
    t_recv: float  # perf_counter() at receipt
    records: np.ndarray | None = None  # RECORD_DTYPE
    rdmap: Callable[[], tuple] | None = None  # the pooled display map of this frame, when asked for
    error: str | None = None  # "frame seq N...: what went wrong"
    lost: bool = False
    frontend: np.ndarray | None = None  # the chain's FRONTEND_DTYPE records [n_rx] (a copy), with records


class Change:
    """A settings change made ready aside. `build()` runs in a thread (returns the chain, or raises
    CubecastError for settings the sensor cannot take); poll() from the processing thread."""

    def __init__(self, settings: ProcessingSettings, epoch: int, build: Callable[[], object] | None = None):
        self.settings, self.epoch = settings, epoch
        self.chain: object | None = None
        self.reason = ""
        self.build_s = 0.0
        self._state = "building"
        self._thread: threading.Thread | None = None
        if build is not None:
            self._thread = threading.Thread(target=self._build, args=(build,), name=f"cubecast-settings-{epoch}",
                                            daemon=True)
            self._thread.start()

    def _build(self, build: Callable[[], object]) -> None:
        t0 = time.perf_counter()
        try:
            self.chain = build()
        except CubecastError as exc:
            self.reason = str(exc)
        except Exception as exc:  # whatever stops the build is the refusal's reason
            self.reason = f"{type(exc).__name__}: {exc}"
        self.build_s = time.perf_counter() - t0

    def refuse(self, reason: str) -> "Change":
        self._state, self.reason = "refused", reason
        return self

    @property
    def built(self) -> bool:
        """The thread's build is done (successfully or not)."""
        return self._thread is not None and not self._thread.is_alive()

    def poll(self) -> str:
        if self._state == "building" and self.built:
            self._state = "refused" if self.reason else "ready"
        return self._state


def _header_fields(msg: Message) -> tuple[int, str, float]:
    h = msg.header
    return h["seq"], h["run"], h["timestamp_s"]


class LocalProcessor:
    """The chain in serve's processing thread: `submit` processes the frame at once."""

    health_fields: tuple[str, ...] = ()
    busy_field = "in_progress"  # the health counter of frames submitted and not yet published

    def __init__(self, sensor: Sensor, settings: ProcessingSettings, calibration: np.ndarray | None,
                 range_bias_m: float, iq_imbalance: np.ndarray | None = None):
        self.sensor = sensor
        self._calibration, self._range_bias_m, self._iq = calibration, range_bias_m, iq_imbalance
        self.pipeline = Pipeline(sensor, settings, calibration, range_bias_m, iq_imbalance)
        self._canon = np.zeros(self.pipeline.frame_shape, np.complex64)
        self._raw_dtype = sensor.adc.raw_dtype()
        self._done: list[Outcome] = []
        self._wake = threading.Event()

    @property
    def stage_ms(self) -> dict:
        return self.pipeline.stage_ms

    def start(self, ctx: zmq.Context, stop: threading.Event) -> None:
        """Every compiled stage (the per-detection ones included) loaded before the first real frame."""
        self.pipeline.warm_up()

    def describe(self) -> str:
        return ""

    def build(self, settings: ProcessingSettings) -> Pipeline:
        """A warmed-up chain for other settings (any thread; raises CubecastError for settings the
        sensor cannot take); use() swaps it in."""
        pipe = Pipeline(self.sensor, settings, self._calibration, self._range_bias_m, self._iq)
        pipe.warm_up()
        return pipe

    def use(self, pipeline: Pipeline) -> None:
        """From the processing thread, between frames: the next frame runs on `pipeline`."""
        self.pipeline = pipeline
        if pipeline.frame_shape != self._canon.shape:
            self._canon = np.zeros(pipeline.frame_shape, np.complex64)

    def prepare(self, settings: ProcessingSettings, epoch: int) -> Change:
        return Change(settings, epoch, lambda: self.build(settings))

    def commit(self, change: Change) -> None:
        self.use(change.chain)

    def abort(self, change: Change) -> None:
        pass

    def wake(self) -> None:
        self._wake.set()

    def has_capacity(self) -> bool:
        return not self._done

    def submit(self, msg: Message, t_recv: float, want_rdmap: bool) -> bool:
        seq, run, ts = _header_fields(msg)
        try:
            if msg.data.dtype == self._raw_dtype:  # the board's format: converted inside the range stage
                points = self.pipeline.process_raw(msg.data)
            else:
                points = self.pipeline.process(to_canonical(self.sensor, msg.data, self._canon))
            out = Outcome(seq, run, ts, t_recv, to_records(points, seq, ts),
                          self.pipeline.display_map if want_rdmap else None, frontend=self.pipeline.frontend.copy())
        except Exception as exc:  # one bad frame must not stop the daemon
            out = Outcome(seq, run, ts, t_recv, error=f"frame seq {seq}: {type(exc).__name__}: {exc}")
        self._done.append(out)
        return True

    def collect(self, timeout_s: float) -> list[Outcome]:
        """The frame submitted last; with none, wait up to timeout_s for a wake-up (a queued frame)."""
        if not self._done:
            if self._wake.wait(timeout_s):
                self._wake.clear()
            return []
        done, self._done = self._done, []
        return done

    def counters(self) -> dict:
        return {}

    def close(self, receiver_stopped: bool = True) -> None:
        pass


RESULT_MAP_BYTES = 1 << 20  # what a result's pooled map may take of the results socket's message limit


class PoolChange(Change):
    """serve's own build first (in a thread), then the workers' (pool.begin_change) until every one
    has answered."""

    def __init__(self, pool: WorkerPool, settings: ProcessingSettings, epoch: int, build, timeout_s: float):
        self.pool, self.timeout_s, self.asked = pool, timeout_s, False
        super().__init__(settings, epoch, build)

    def poll(self) -> str:
        if self._state != "building" or not self.built:
            return self._state
        if self.reason:
            self._state = "refused"
        elif not self.asked:
            self.pool.begin_change(self.epoch, self.settings, self.timeout_s)
            self.asked = True
        else:
            state, reason = self.pool.change_state()
            if state != "pending":
                self._state, self.reason = state, reason
        return self._state


class PoolProcessor:
    """The chain in worker processes: frames go to workers with free capacity; results come back in
    frame order. serve fills the numba cache first (so that workers only load it, never race
    compiling it) and keeps no frame-sized buffers itself."""

    health_fields = ("workers", "workers_alive", "workers_refused", "worker_results_discarded",
                     "worker_handshakes_refused")
    busy_field = "in_flight"

    def __init__(self, sensor: Sensor, settings: ProcessingSettings, calibration: np.ndarray | None,
                 range_bias_m: float, tasks_endpoint: str, results_endpoint: str, *, local_workers: int = 0,
                 task_timeout_s: float | None = None, keys: ServerKeys | None = None, log_interval_s: float = 5.0,
                 iq_imbalance: np.ndarray | None = None):
        self._pipeline: Pipeline | None = Pipeline(sensor, settings, calibration, range_bias_m,
                                                   iq_imbalance)  # checks them
        self.sensor, self._calibration, self._range_bias_m = sensor, calibration, range_bias_m
        self._iq = iq_imbalance
        self.change_timeout_s = CHANGE_TIMEOUT_S
        self.pool = WorkerPool(
            WorkerConfig(sensor, settings, calibration, float(range_bias_m), iq_imbalance=iq_imbalance),
            tasks_endpoint, results_endpoint,
            local_workers=local_workers, task_timeout_s=DEFAULT_TASK_TIMEOUT_S if task_timeout_s is None
            else task_timeout_s, keys=keys, log_interval_s=log_interval_s)
        self.stage_ms: dict = {}
        self._wake_pull: zmq.Socket | None = None
        self._wake_push: zmq.Socket | None = None

    def start(self, ctx: zmq.Context, stop: threading.Event) -> None:
        """Warm up here, bind the worker endpoints, start the local workers and wait until each
        reports ready."""
        self._pipeline.warm_up()
        self._pipeline = None  # workers run the chain
        self._wake_pull = ctx.socket(zmq.PULL)
        self._wake_pull.setsockopt(zmq.LINGER, 0)
        self._wake_pull.setsockopt(zmq.RCVHWM, 1)
        endpoint = f"inproc://cubecast-serve-wake-{id(self)}"
        self._wake_pull.bind(endpoint)
        self._wake_push = ctx.socket(zmq.PUSH)
        self._wake_push.setsockopt(zmq.LINGER, 0)
        self._wake_push.setsockopt(zmq.SNDHWM, 1)
        self._wake_push.connect(endpoint)
        self.pool.bind(ctx, self._wake_pull)
        self.pool.start_local()
        self.pool.wait_ready(len(self.pool.slots), STARTUP_TIMEOUT_S, stop)

    def describe(self) -> str:
        p = self.pool
        return f", workers: {len(p.slots)} local, tasks {p.tasks_endpoint}, results {p.results_endpoint}"

    def wake(self) -> None:
        """From the receiver thread (the only user of the push end): end the processing thread's
        socket poll."""
        try:
            self._wake_push.send(b"", zmq.NOBLOCK)
        except zmq.Again:  # a wake-up is already pending
            pass

    def has_capacity(self) -> bool:
        return self.pool.can_dispatch()

    def prepare(self, settings: ProcessingSettings, epoch: int) -> Change:
        """serve builds the chain first (it checks the settings against the sensor and fills the numba
        cache, so that workers only load it), then every worker builds its own (PoolChange)."""
        limit = self.pool.max_result_bytes - RESULT_MAP_BYTES
        if self.pool.result_bytes(settings) > limit:
            return Change(settings, epoch).refuse(
                f"max_points x angle_max_peaks = {settings.max_points * settings.angle_max_peaks} points: serve's "
                f"results socket was opened for at most {limit // RECORD_DTYPE.itemsize} per frame (4 x those of "
                "its start-up settings); restart serve with these settings")

        def build() -> None:
            pipe = Pipeline(self.sensor, settings, self._calibration, self._range_bias_m, self._iq)
            pipe.warm_up()
            return None  # serve keeps no chain: the workers run it

        return PoolChange(self.pool, settings, epoch, build, self.change_timeout_s)

    def commit(self, change: Change) -> None:
        self.pool.commit_change()

    def abort(self, change: Change) -> None:
        if isinstance(change, PoolChange) and change.asked:
            self.pool.abort_change()

    def submit(self, msg: Message, t_recv: float, want_rdmap: bool) -> bool:
        return self.pool.dispatch(msg, t_recv, want_rdmap)

    def collect(self, timeout_s: float) -> list[Outcome]:
        """Frames lost with their workers, then those now publishable in frame order."""
        completed, lost = self.pool.poll(int(timeout_s * 1000))
        out = [Outcome(e.seq, e.run, e.timestamp_s, e.t_recv, lost=True) for e in lost]
        for entry in completed:
            res, entry.result = entry.result, None
            o = Outcome(entry.seq, entry.run, entry.timestamp_s, entry.t_recv)
            if res.error is not None:
                o.error = f"frame seq {entry.seq} (worker {res.worker}): {res.error}"
            else:
                o.records, o.frontend = res.records, res.frontend
                if res.rdmap is not None:
                    o.rdmap = (lambda m=res.rdmap: m)
                self.stage_ms = res.stage_ms
            out.append(o)
        return out

    def counters(self) -> dict:
        return {"workers": self.pool.rows, **self.pool.counters()}

    def close(self, receiver_stopped: bool = True) -> None:
        """Stop the local workers, close the sockets (the wake-up's push end only once the receiver
        thread, its user, has stopped)."""
        self.pool.close()
        if self._wake_pull is not None:
            self._wake_pull.close(linger=0)
            self._wake_pull = None
        if self._wake_push is not None and receiver_stopped:
            self._wake_push.close(linger=0)
            self._wake_push = None
