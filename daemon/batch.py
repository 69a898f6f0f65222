"""`cubecast batch`: a campaign of captures through the chain on a Dask distributed cluster, one point
file per capture, byte for byte what `cubecast process` writes; `--compare` judges two runs
(batchcompare.py).

The driver plans each capture (batchplan.py: its output name, the digest of its inputs, whether its
output is up to date), splits the frame indexes of each capture to do into ranges of
--frames-per-task, submits one task per range (batchwork.process_chunk, at most a few per worker
thread ahead), and writes each capture's points in frame order as the ranges come back: the writer of
exports.py runs here, under a temporary name renamed into place when the capture is complete, then
the record of its inputs beside it. A capture that fails (cannot be opened, a corrupt frame without
--skip-corrupt, a task lost more often than the scheduler allows) is reported and the others go on.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import secrets
import sys
import time
from collections import Counter, deque
from dataclasses import dataclass, field
from pathlib import Path

from . import batchplan, exports
from .batchwork import ChunkJob, code_digest, process_chunk
from .errors import CubecastError, is_integer
from .frontendout import FrontendRun
from .progress import Progress

log = logging.getLogger(__name__)

EXTRA_HINT = "pip install 'cubecast[batch]'"
DEFAULT_FRAMES_PER_TASK = 50
ALLOWED_FAILURES = 3   # a task whose worker dies is given to another worker up to this many times
TASK_RETRIES = 1       # a task that raised an unexpected exception runs once more
TASKS_PER_THREAD = 3   # tasks submitted ahead per worker thread
CONNECT_TIMEOUT_S = 30.0


def _distributed():
    try:
        import dask
        import distributed
    except ImportError as exc:
        raise CubecastError(f"cubecast batch needs dask and distributed ({exc}): {EXTRA_HINT}") from None
    return dask, distributed


@contextlib.contextmanager
def cluster_client(scheduler: str | None, local_workers: int | None, timeout_s: float = CONNECT_TIMEOUT_S):
    """A Dask client: of the scheduler at `scheduler`, or of a LocalCluster of `local_workers` worker
    processes (one thread each) on 127.0.0.1, closed on leaving."""
    dask, distributed = _distributed()
    if scheduler:
        try:
            client = distributed.Client(scheduler, timeout=timeout_s)
        except (OSError, TimeoutError, ValueError) as exc:
            raise CubecastError(f"--scheduler {scheduler}: cannot connect within {timeout_s:g} s: {exc}") from None
        try:
            try:
                client.wait_for_workers(1, timeout=timeout_s)
            except TimeoutError:
                raise CubecastError(f"--scheduler {scheduler}: no worker joined within {timeout_s:g} s (start "
                                    f"some: dask worker {scheduler})") from None
            yield client
        finally:
            client.close()
        return
    n = local_workers or len(os.sched_getaffinity(0))
    with dask.config.set({"distributed.scheduler.allowed-failures": ALLOWED_FAILURES}):
        try:
            # death_timeout bounds each worker process's start (and its wait for a lost scheduler)
            cluster = distributed.LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                                               dashboard_address=None, death_timeout=timeout_s)
        except Exception as exc:  # the engine's own errors (a worker process that cannot start)
            raise CubecastError(f"cannot start the local cluster of {n} worker processes: "
                                f"{type(exc).__name__}: {exc}") from None
        try:
            client = distributed.Client(cluster, timeout=timeout_s)
            try:
                yield client
            finally:
                client.close()
        finally:
            cluster.close(timeout=timeout_s)


class BatchProgress(Progress):
    """The batch's progress: on a terminal a tqdm bar over the frames (rate and time left are tqdm's);
    otherwise a log line a second with the frames and captures done out of their totals, the rate
    since the last line and the time left at that rate (frames left / rate, common practice)."""

    def __init__(self, frames_total: int, captures_total: int, bar: bool = False, **kw):
        super().__init__(f"batch of {captures_total}", ("frames", "captures"), logger=log, bar=bar,
                         total=frames_total, **kw)
        self.frames_total, self.captures_total = frames_total, captures_total

    def _line(self, seconds: float, since: dict[str, int]) -> None:
        rate = self.rates(seconds, since)["frames"]
        done, captures = self.counts["frames"], self.counts["captures"]
        left = f"{(self.frames_total - done) / rate:.0f} s left" if rate > 0 else "time left unknown"
        self.log.info("batch: %d of %d frames (%.1f/s), %d of %d captures, %s", done, self.frames_total, rate,
                      captures, self.captures_total, left,
                      extra={"progress": True, "frames": done, "captures": captures})


@dataclass
class CaptureRun:
    """One capture of the batch: its plan, then its progress as the ranges come back."""
    index: int
    path: Path
    out: Path
    status: str = "pending"      # then "done", "up to date" or "failed"
    reason: str = ""             # why it is processed, or why it failed
    job: ChunkJob | None = None
    chunks: list[tuple[int, int]] = field(default_factory=list)
    frames_total: int = 0
    repeated: int = 0
    sensor_id: str = ""
    figures: dict = field(default_factory=dict)
    inputs: dict = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)
    next_chunk: int = 0
    buffered: dict[int, dict] = field(default_factory=dict)
    writer: exports.PointWriter | None = None
    placement: batchplan.Placement | None = None
    frames: int = 0
    points: int = 0
    corrupt: int = 0
    tasks: int = 0
    task_s: float = 0.0
    t_first: float | None = None
    wall_s: float | None = None
    monitor: FrontendRun | None = None   # the front end's summary over the capture (as process logs it)

    def row(self) -> dict:
        """The report's row; a failed capture has no output, so its counts are null."""
        failed = self.status == "failed"
        return {"capture": str(self.path), "output": None if failed else str(self.out), "status": self.status,
                "reason": self.reason, "frames": None if failed else self.frames,
                "points": None if failed else self.points, "corrupt_skipped": None if failed else self.corrupt,
                "repeated_skipped": self.repeated, "tasks": self.tasks, "task_s": round(self.task_s, 3),
                "wall_s": None if self.wall_s is None else round(self.wall_s, 3),
                "frontend": None if failed or self.monitor is None else self.monitor.summary.health()}


class Batch:
    """The driver: plan(), then run(client); rows() and totals() for the report."""

    def __init__(self, captures: list[Path], out_dir: Path, fmt: str, settings, calibration_path=None,
                 skip_corrupt: bool = False, frames_per_task: int = DEFAULT_FRAMES_PER_TASK):
        self.out_dir, self.fmt, self.settings = out_dir, fmt, settings
        self.calibration_path, self.skip_corrupt, self.frames_per_task = calibration_path, skip_corrupt, frames_per_task
        try:
            self.calibration_sha256 = batchplan.file_sha256(calibration_path) if calibration_path else None
        except OSError as exc:
            raise CubecastError(f"--calibration {calibration_path}: cannot read: {exc.strerror or exc}") from None
        self.code_sha256 = batchplan.code_inputs(fmt)  # the digest rule's "code"
        self.runs = [CaptureRun(i, p, out_dir / batchplan.output_name(p, fmt)) for i, p in enumerate(captures)]
        self.workers: Counter = Counter()
        self.wall_s = 0.0    # from the first task submitted to the last output written
        self.cluster_s = 0.0  # connecting to the cluster (or starting the local one)
        self._progress = None
        self._frames_done = 0

    # ---- planning ---------------------------------------------------------------------------
    def plan(self) -> None:
        for run in self.runs:
            try:
                self._plan(run)
            except CubecastError as exc:
                self._fail(run, str(exc))

    def _plan(self, run: CaptureRun) -> None:
        from .capture import CaptureReader
        from .files import capture_sensor
        from .process import load_calibration_for
        try:
            st = run.path.stat()
            capture_sha256 = batchplan.file_sha256(run.path)
        except OSError as exc:
            raise CubecastError(f"capture {str(run.path)!r}: cannot read: {exc.strerror or exc}") from None
        with CaptureReader(run.path, skip_corrupt=self.skip_corrupt, skip_repeated=True) as reader:
            sensor = capture_sensor(reader)
            n, run.repeated = len(reader), reader.counts["repeated"]
            run.problems = reader.problems
        run.sensor_id, run.figures = sensor.sensor_id, batchplan.sensor_figures(sensor)
        cal = load_calibration_for(self.calibration_path, sensor)
        run.inputs = batchplan.input_digests(capture_sha256, self.settings, self.calibration_sha256, self.fmt,
                                             self.skip_corrupt, self.code_sha256)
        stale = batchplan.why_stale(run.out, run.inputs)
        if stale is None:
            old = batchplan.read_record(run.out) or {}
            run.status, run.reason = "up to date", "output matches its inputs"
            run.frames, run.points = int(old.get("frames", 0)), int(old.get("points", 0))
            run.corrupt = int(old.get("corrupt_skipped", 0))
            return
        run.reason = stale
        run.job = ChunkJob(str(run.path.resolve()), st.st_size, st.st_mtime_ns, self.settings, cal.vector,
                           cal.range_bias_m, cal.iq_imbalance, self.calibration_sha256, self.skip_corrupt, code_digest())
        k = self.frames_per_task
        run.chunks = [(a, min(n, a + k)) for a in range(0, n, k)]
        run.frames_total = n - run.repeated
        run.placement = batchplan.Placement(run.out, self.fmt in exports.FOLDER_FORMATS)

    # ---- running ----------------------------------------------------------------------------
    def run(self, client, progress: bool = False) -> None:
        todo = [r for r in self.runs if r.status == "pending"]
        t0 = time.perf_counter()
        log.info("batch: %d captures to process (%d frames), %d up to date, %d failed", len(todo),
                 sum(r.frames_total for r in todo), sum(r.status == "up to date" for r in self.runs),
                 sum(r.status == "failed" for r in self.runs))
        self._progress = BatchProgress(sum(r.frames_total for r in todo), len(todo), bar=progress)
        redirect = contextlib.nullcontext()
        if progress:  # log lines above the bar, not through it
            from tqdm.contrib.logging import logging_redirect_tqdm
            redirect = logging_redirect_tqdm([logging.getLogger("cubecast")])
        with redirect:
            self._run(client, todo)
        self.wall_s = time.perf_counter() - t0

    def _run(self, client, todo: list[CaptureRun]) -> None:
        from distributed import as_completed
        try:
            for run in todo:
                log.debug("%s: processing (%s)", run.path, run.reason)
                if not run.chunks:  # a capture without frames: an empty output
                    self._write_ready(run)
            queue = deque((run, k) for run in todo for k in range(len(run.chunks)))
            window = max(4, TASKS_PER_THREAD * sum(client.nthreads().values()))
            token = secrets.token_hex(4)
            pending = as_completed()
            where: dict[str, tuple[CaptureRun, int]] = {}
            while queue or where:
                while queue and len(where) < window:
                    run, k = queue.popleft()
                    if run.status != "pending":
                        continue
                    run.t_first = run.t_first or time.perf_counter()
                    start, stop = run.chunks[k]
                    fut = client.submit(process_chunk, run.job, start, stop, pure=False, retries=TASK_RETRIES,
                                        key=f"cubecast-batch-{token}-{run.index:05d}-{k:05d}")
                    where[fut.key] = (run, k)
                    pending.add(fut)
                if not where:
                    break
                fut = next(pending)
                run, k = where.pop(fut.key)
                self._received(run, k, fut)
        finally:
            for run in todo:
                if run.status == "pending":
                    self._fail(run, "the batch stopped before it was complete")
            self._progress.close()

    def _received(self, run: CaptureRun, k: int, fut) -> None:
        if run.status != "pending":
            return  # a range of a capture that failed meanwhile
        if fut.status != "finished":
            exc = fut.exception() if fut.status == "error" else f"the task was {fut.status}"
            why = f"{type(exc).__name__}: {exc}" if isinstance(exc, BaseException) else exc
            self._fail(run, f"task {k} (frame indexes {run.chunks[k][0]}..{run.chunks[k][1] - 1}) failed: {why}")
            return
        res = fut.result()
        run.tasks += 1
        run.task_s += res["elapsed_s"]
        self.workers[res["worker"]] += 1
        if "error" in res:
            self._fail(run, res["error"])
            return
        run.buffered[k] = res
        self._frames_done += len(res["frames"]) + res["corrupt_skipped"]
        self._progress.update(frames=self._frames_done)
        self._write_ready(run)

    def _write_ready(self, run: CaptureRun) -> None:
        """Write the ranges that are next in frame order; finish the capture after its last."""
        try:
            while run.next_chunk in run.buffered:
                res = run.buffered.pop(run.next_chunk)
                self._writer(run)
                for seq, ts, records, front in res["frames"]:
                    run.writer.write_frame(seq, ts, records, run.sensor_id)
                    if run.monitor is None:
                        run.monitor = FrontendRun(len(front), res["full_scale"])
                    run.monitor.add(seq, ts, front)
                run.corrupt += res["corrupt_skipped"]
                run.problems += res["problems"]
                run.next_chunk += 1
            if run.next_chunk == len(run.chunks):
                self._writer(run)
                run.placement.commit()
                run.writer.close()
                run.placement.done()
                run.frames, run.points = run.writer.frames, run.writer.points
                self._finish(run)
        except CubecastError as exc:
            self._fail(run, str(exc))
        except OSError as exc:
            self._fail(run, f"{run.out}: cannot write: {exc.strerror or exc}")

    def _writer(self, run: CaptureRun) -> None:
        if run.writer is None:
            run.placement.clean()
            run.writer = exports.WRITERS[self.fmt](run.out, "--out").open()

    def _finish(self, run: CaptureRun) -> None:
        run.wall_s = time.perf_counter() - (run.t_first or time.perf_counter())
        for p in run.problems:
            log.warning("cubecast batch: warning: %s: %s", run.path, p)
        batchplan.write_record(run.out, {
            "capture": str(run.path.resolve()), "output": run.out.name, "name": run.path.stem, "format": self.fmt,
            "inputs": run.inputs, "sensor": run.figures, "frames": run.frames, "points": run.points,
            "corrupt_skipped": run.corrupt, "repeated_skipped": run.repeated, "problems": run.problems,
            "tasks": run.tasks, "task_s": round(run.task_s, 3), "wall_s": round(run.wall_s, 3),
            "frontend": None if run.monitor is None else run.monitor.summary.health()})
        run.status = "done"
        self._progress.update(captures=sum(r.status == "done" for r in self.runs))
        log.info("%s: %d frames, %d points -> %s", run.path, run.frames, run.points, run.out)
        if run.monitor is not None:
            run.monitor.log_summary(log, prefix=f"{run.path.name}: ")

    def _fail(self, run: CaptureRun, why: str) -> None:
        run.status, run.reason = "failed", why
        if run.writer is not None:
            run.writer.abort()
        if run.placement is not None:
            run.placement.failed()
        run.buffered.clear()
        log.error("cubecast batch: %s failed: %s", run.path, why)

    # ---- report -----------------------------------------------------------------------------
    def rows(self) -> list[dict]:
        return [r.row() for r in self.runs]

    def totals(self) -> dict:
        done = [r for r in self.runs if r.status == "done"]
        frames = sum(r.frames + r.corrupt for r in done)
        return {"captures": len(self.runs), "done": len(done),
                "up_to_date": sum(r.status == "up to date" for r in self.runs),
                "failed": sum(r.status == "failed" for r in self.runs),
                "frames_processed": frames, "points_written": sum(r.points for r in done),
                "corrupt_skipped": sum(r.corrupt for r in done), "tasks": sum(r.tasks for r in self.runs),
                "workers": dict(self.workers), "cluster_s": round(self.cluster_s, 3), "wall_s": round(self.wall_s, 3),
                "frames_per_s": round(frames / self.wall_s, 2) if self.wall_s > 0 and frames else 0.0}


def format_report(rows: list[dict], totals: dict) -> str:
    head = ("capture", "status", "frames", "points", "corrupt", "tasks", "task_s", "wall_s", "output / reason")
    table = [head]
    for r in rows:
        failed = r["status"] == "failed"
        nums = ("-",) * 6 if failed else (str(r["frames"]), str(r["points"]), str(r["corrupt_skipped"]),
                                          str(r["tasks"]), f"{r['task_s']:.2f}",
                                          "-" if r["wall_s"] is None else f"{r['wall_s']:.2f}")
        table.append((Path(r["capture"]).name, r["status"], *nums, r["reason"] if failed else r["output"]))
    widths = [max(len(row[i]) for row in table) for i in range(len(head) - 1)]
    lines = ["  ".join(c.ljust(w) if i < 2 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths))) + "  "
             + row[-1] for row in table]
    t = totals
    lines.append(f"total: {t['captures']} captures: {t['done']} done, {t['up_to_date']} up to date, {t['failed']} "
                 f"failed; {t['frames_processed']} frames processed, {t['points_written']} points written, "
                 f"{t['corrupt_skipped']} corrupt frames skipped, {t['tasks']} tasks on {len(t['workers'])} "
                 f"workers, {t['wall_s']:.2f} s ({t['frames_per_s']:.1f} frames/s) after {t['cluster_s']:.2f} s "
                 "to reach the cluster")
    return "\n".join(lines)


# ---- command ------------------------------------------------------------------------------------

def run(args) -> int:
    if args.compare:
        if args.captures or args.out:
            raise CubecastError("--compare RUN_A RUN_B takes two output folders of earlier runs, no captures "
                                "and no --out")
        from .batchcompare import compare_runs, format_comparison
        result = compare_runs(Path(args.compare[0]), Path(args.compare[1]), gate=args.gate)
        print(json.dumps(result, allow_nan=False) if args.json else format_comparison(result))
        return 0
    if not args.captures or not args.out:
        raise CubecastError("give the captures (files or folders) and --out DIR, or --compare RUN_A RUN_B")
    return run_batch(args)


def run_batch(args) -> int:
    from .logs import show_progress
    from .settings import load_settings
    fmt = exports.resolve_format("--format", args.format, args.format)
    exports.require_extra("--format", args.format, fmt)
    if not is_integer(args.frames_per_task) or args.frames_per_task < 1:
        raise CubecastError(f"--frames-per-task {args.frames_per_task}: must be at least 1")
    if args.local_workers is not None and (args.local_workers < 1 or args.scheduler):
        raise CubecastError(f"--local-workers {args.local_workers}: must be at least 1, and not with --scheduler")
    _distributed()  # the extra, before any work
    captures = batchplan.find_captures(args.captures)
    batchplan.check_names(captures, fmt)
    settings = load_settings(args.settings)
    out_dir = Path(args.out)
    out_dir.mkdir(parents=True, exist_ok=True)
    batch = Batch(captures, out_dir, fmt, settings, args.calibration, args.skip_corrupt, args.frames_per_task)
    batch.plan()
    if not any(r.status == "pending" for r in batch.runs):
        log.info("batch: nothing to process (%d up to date, %d failed)",
                 sum(r.status == "up to date" for r in batch.runs), sum(r.status == "failed" for r in batch.runs))
    else:
        t0 = time.perf_counter()
        with cluster_client(args.scheduler, args.local_workers) as client:
            batch.cluster_s = time.perf_counter() - t0
            batch.run(client, progress=show_progress() and sys.stderr.isatty())  # else log lines
    rows, totals = batch.rows(), batch.totals()
    print(json.dumps({"captures": rows, "totals": totals}, allow_nan=False) if args.json
          else format_report(rows, totals), flush=True)
    failed = [r for r in rows if r["status"] == "failed"]
    if failed:
        raise CubecastError(f"{len(failed)} of {len(rows)} captures failed: "
                            + "; ".join(f"{r['capture']} ({r['reason']})" for r in failed))
    return 0


def add_parser(subparsers):
    p = subparsers.add_parser("batch", help="process many captures on a Dask cluster, one point file each "
                                            "(resumable); --compare two runs (needs cubecast[batch])")
    p.add_argument("captures", nargs="*", metavar="CAPTURE", help="capture files, or folders of .cap files")
    p.add_argument("--out", help="folder for the outputs (made if missing): STEM.csv ... and STEM.csv.batch.json")
    p.add_argument("--format", default="csv", metavar="{csv,npz,pcd,ply,mcap,rosbag}",
                   help="point format as for `cubecast process --format` (default csv)")
    p.add_argument("--settings", help="processing settings (TOML, [processing] section)")
    p.add_argument("--calibration", help="calibration file (TOML)")
    p.add_argument("--skip-corrupt", action="store_true",
                   help="skip frames whose CRC fails (counted); default: such a capture fails")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS", help="an existing Dask scheduler, e.g. tcp://HOST:8786")
    where.add_argument("--local-workers", type=int, metavar="N",
                       help="worker processes of the local cluster on 127.0.0.1 (default: one per CPU)")
    p.add_argument("--frames-per-task", type=int, default=DEFAULT_FRAMES_PER_TASK, metavar="N",
                   help=f"frames of a capture per task (default {DEFAULT_FRAMES_PER_TASK})")
    p.add_argument("--compare", nargs=2, metavar=("RUN_A", "RUN_B"),
                   help="compare the outputs of two runs (csv or npz): points gained, lost and shifted")
    p.add_argument("--gate", type=float, default=2.0,
                   help="--compare's matching gate in scaled units (default 2; README \"Batch\")")
    p.add_argument("--json", action="store_true", help="print the report as one JSON object")
    p.set_defaults(func=run)
    return p
