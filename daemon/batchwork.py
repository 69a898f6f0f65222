"""`cubecast batch`, the worker's side: one task is a range of frame indexes of one capture through
`cubecast process`'s own code path (process.iter_processed), its point records sent back to the
driver, which writes them in frame order.

Runs inside a Dask worker process (imported there by the task's pickled reference). A worker keeps
the pipelines it built (one per sensor, settings and calibration), so that a campaign of captures of
one sensor pays the chain's set-up once per worker. A task never raises for a problem the capture
causes (a corrupt frame, a frame of another shape, a capture changed meanwhile): it returns it as
{"error": text}, so the engine does not retry what would fail again; what it retries is a task whose
worker died (the scheduler's reassignment) and an unexpected exception (the task's retries).
"""

from __future__ import annotations

import functools
import hashlib
import os
import socket
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .capture import CaptureReader
from .errors import CubecastError
from .settings import ProcessingSettings

PIPELINES_KEPT = 4  # pipelines a worker keeps (each holds a few frame-sized buffers)


@functools.lru_cache(maxsize=1)
def code_digest() -> str:
    """SHA-256 (hex) of what the points depend on besides the inputs: every module of cubecast.daemon
    (chain included) and the numpy, scipy and numba versions. The driver and every worker compute it;
    a worker with other code refuses the task (its points could differ)."""
    import numba
    import scipy
    digest = hashlib.sha256(f"numpy {np.__version__} scipy {scipy.__version__} numba {numba.__version__}".encode())
    root = Path(__file__).parent
    for path in sorted(root.rglob("*.py")):
        digest.update(path.relative_to(root).as_posix().encode() + b"\0" + path.read_bytes() + b"\0")
    return digest.hexdigest()


@dataclass(frozen=True)
class ChunkJob:
    """What every task of one capture shares: the capture (path as the workers see it, and its size
    and modification time when the batch planned it), the validated settings, the calibration (vector,
    range bias and I/Q table, read and checked against the capture's sensor by the driver) and the code digest."""
    capture: str
    size_bytes: int
    mtime_ns: int
    settings: ProcessingSettings
    calibration_vector: np.ndarray | None
    range_bias_m: float
    iq_imbalance: np.ndarray | None  # [n_rx, 2] (g, phi_rad) of the calibration's I/Q table, or None
    calibration_sha256: str | None
    skip_corrupt: bool
    code_sha256: str


_pipelines: dict[tuple, object] = {}


def _pipeline(sensor, job: ChunkJob):
    from .chain.pipeline import Pipeline
    key = (sensor.digest, job.settings, job.calibration_sha256, job.range_bias_m)
    pipe = _pipelines.pop(key, None)
    if pipe is None:
        pipe = Pipeline(sensor, job.settings, job.calibration_vector, job.range_bias_m, job.iq_imbalance)
    _pipelines[key] = pipe  # most recently used last
    while len(_pipelines) > PIPELINES_KEPT:
        del _pipelines[next(iter(_pipelines))]
    return pipe


def process_chunk(job: ChunkJob, start: int, stop: int) -> dict:
    """Frame indexes start..stop-1 of job.capture, as `cubecast process` reads them (copies of earlier
    records skipped; corrupt frames skipped with job.skip_corrupt, else an error). Returns
    {"frames": [(sequence, timestamp_s, records), ...], "corrupt_skipped", "problems", "elapsed_s",
    "worker"} or {"error": text, ...}."""
    from .files import capture_sensor
    from .process import iter_processed
    t0 = time.perf_counter()
    where = f"{socket.gethostname()} pid {os.getpid()}"
    try:
        if code_digest() != job.code_sha256:
            raise CubecastError(f"the worker on {where} runs other cubecast code (or numpy, scipy, numba "
                                "versions) than the batch: install the same version on every worker")
        try:
            st = os.stat(job.capture)
        except OSError as exc:
            raise CubecastError(f"capture {job.capture!r}: cannot open on the worker ({where}): "
                                f"{exc.strerror or exc}") from None
        if (st.st_size, st.st_mtime_ns) != (job.size_bytes, job.mtime_ns):
            raise CubecastError(f"capture {job.capture!r}: changed since the batch started (size {st.st_size} "
                                f"bytes, was {job.size_bytes})")
        with CaptureReader(job.capture, skip_corrupt=job.skip_corrupt, skip_repeated=True) as reader:
            expected = sum(1 for j in range(start, stop) if reader.repeat_of(j) is None)
            before = len(reader.problems)
            sensor = capture_sensor(reader)
            pipeline = _pipeline(sensor, job)
            # each frame's front-end records beside its points (as `process` reads pipeline.frontend)
            frames = [(seq, ts, records, pipeline.frontend.copy())
                      for seq, ts, records in iter_processed(reader, pipeline, start=start, stop=stop)]
            problems = [p for p in reader.problems[before:] if p.startswith("skipped frame")]
    except CubecastError as exc:
        return {"error": str(exc), "worker": where, "elapsed_s": time.perf_counter() - t0}
    return {"frames": frames, "corrupt_skipped": expected - len(frames), "problems": problems,
            "full_scale": float(sensor.adc.full_scale), "elapsed_s": time.perf_counter() - t0, "worker": where}
