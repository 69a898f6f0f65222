"""Offline processing: a capture file through the chain into a point-cloud file (any format of exports.py)."""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Iterator

import numpy as np

from . import exports
from .capture import CaptureReader
from .chain.pipeline import Pipeline
from .chain.points import to_records
from .files import capture_sensor, iter_capture_frames
from .frontendout import FrontendRun
from .settings import load_settings

log = logging.getLogger(__name__)


def load_calibration_for(path, sensor):
    """What a Pipeline takes from a calibration file (calibfile.ChainCalibration: the per-channel
    vector, the range bias in metres, the I/Q table), all empty without a file."""
    from .calibfile import load_chain_calibration
    return load_chain_calibration(path, sensor)


def make_pipeline(sensor, settings, calibration_path=None) -> Pipeline:
    cal = load_calibration_for(calibration_path, sensor)
    return Pipeline(sensor, settings, cal.vector, cal.range_bias_m, cal.iq_imbalance)


def iter_processed(reader: CaptureReader, pipeline: Pipeline, progress: bool = False, start: int = 0,
                   stop: int | None = None) -> Iterator[tuple[int, float, np.ndarray]]:
    """(sequence, timestamp_s, records) for every readable frame of a capture (of the frame indexes
    start..stop-1 only, if given: `cubecast batch`), in order; frames without points give an empty
    record array."""
    frames = iter_capture_frames(reader, pipeline.sensor, first=start, stop=stop)
    if progress:
        from tqdm import tqdm
        total = len(reader) - (reader.counts["repeated"] if reader.skip_repeated else 0)
        frames = tqdm(frames, total=total, desc="process", unit="frame")
    for seq, ts, frame in frames:
        yield seq, ts, to_records(pipeline.process(frame), seq, ts)


def process_frames(reader: CaptureReader, pipeline: Pipeline, progress: bool = False) -> list[np.ndarray]:
    """Run every readable frame of a capture through the chain; one record array per frame."""
    return [records for _, _, records in iter_processed(reader, pipeline, progress)]


def process_capture(capture: str | Path, out: str | Path, fmt: str | None = None, settings_path=None,
                    calibration_path=None, progress: bool = True, skip_corrupt: bool = False,
                    frontend_out: str | Path | None = None) -> int:
    """`cubecast process`: every frame's points into `out` in `fmt` (or the format its name says),
    written as they come under a temporary name and renamed into place at the end; the front end's
    monitor summed up in the log at the end (frontendout.py), and per frame and channel into the CSV
    `frontend_out` when given."""
    fmt = exports.check_target("--out", out, fmt)  # before the processing, not after it
    settings = load_settings(settings_path)
    # a copy of an earlier record (the reader's `repeated`) holds no new frame: it is not processed
    with CaptureReader(capture, skip_corrupt=skip_corrupt, skip_repeated=True) as reader:
        sensor = capture_sensor(reader)
        pipeline = make_pipeline(sensor, settings, calibration_path)
        with exports.WRITERS[fmt](out, "--out") as writer, \
                FrontendRun(sensor.n_rx, sensor.adc.full_scale, frontend_out) as monitor:
            for seq, ts, records in iter_processed(reader, pipeline, progress):
                writer.write_frame(seq, ts, records, sensor.sensor_id)
                monitor.add(seq, ts, pipeline.frontend)
        problems = reader.problems
        repeated = reader.counts["repeated"]
    for p in problems:
        log.warning("cubecast process: warning: %s: %s", capture, p)
    skipped = f" ({repeated} repeated record{'s' if repeated != 1 else ''} skipped)" if repeated else ""
    log.info("%d frames, %d points -> %s%s", writer.frames, writer.points, out, skipped)
    monitor.log_summary(log)
    if frontend_out is not None:
        log.info("front end: %d frames x %d channels -> %s", monitor.summary.frames, sensor.n_rx, frontend_out)
    return 0
