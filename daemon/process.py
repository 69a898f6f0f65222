"""Offline processing: a capture file through the chain into a point-cloud file (CSV or npz)."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from .capture import CaptureReader
from .cliout import check_output_path
from .errors import CubecastError
from .chain.pipeline import Pipeline
from .chain.points import to_records
from .files import capture_sensor, iter_capture_frames, write_points_csv, write_points_npz
from .settings import load_settings

log = logging.getLogger(__name__)


def load_calibration_for(path, sensor) -> tuple[np.ndarray | None, float]:
    """(per-channel calibration vector, range bias in metres) from a calibration file, or (None, 0)."""
    if path is None:
        return None, 0.0
    from .calibfile import load_calibration_file
    cal = load_calibration_file(path, sensor)
    return cal.vector, cal.range_bias_m


def make_pipeline(sensor, settings, calibration_path=None) -> Pipeline:
    vector, bias = load_calibration_for(calibration_path, sensor)
    return Pipeline(sensor, settings, vector, bias)


def process_frames(reader: CaptureReader, pipeline: Pipeline, progress: bool = False) -> list[np.ndarray]:
    """Run every readable frame of a capture through the chain; one record array per frame."""
    records = []
    frames = iter_capture_frames(reader, pipeline.sensor)
    if progress:
        from tqdm import tqdm
        total = len(reader) - (reader.counts["repeated"] if reader.skip_repeated else 0)
        frames = tqdm(frames, total=total, desc="process", unit="frame")
    for seq, ts, frame in frames:
        records.append(to_records(pipeline.process(frame), seq, ts))
    return records


def process_capture(capture: str | Path, out: str | Path, fmt: str | None = None, settings_path=None,
                    calibration_path=None, progress: bool = True, skip_corrupt: bool = False) -> int:
    fmt = fmt or ("npz" if str(out).endswith(".npz") else "csv" if str(out).endswith(".csv") else None)
    if fmt is None:
        raise CubecastError(f"--out {out}: name a .csv or .npz file, or give --format")
    check_output_path("--out", str(out))  # before the processing, not after it
    settings = load_settings(settings_path)
    # a copy of an earlier record (the reader's `repeated`) holds no new frame: it is not processed
    with CaptureReader(capture, skip_corrupt=skip_corrupt, skip_repeated=True) as reader:
        sensor = capture_sensor(reader)
        pipeline = make_pipeline(sensor, settings, calibration_path)
        records = process_frames(reader, pipeline, progress)
        problems = reader.problems
        repeated = reader.counts["repeated"]
    try:
        n = (write_points_npz if fmt == "npz" else write_points_csv)(out, records)
    except OSError as exc:
        raise CubecastError(f"--out {out}: cannot write: {exc.strerror or exc}") from None
    for p in problems:
        log.warning("cubecast process: warning: %s: %s", capture, p)
    skipped = f" ({repeated} repeated record{'s' if repeated != 1 else ''} skipped)" if repeated else ""
    log.info("%d frames, %d points -> %s%s", len(records), n, out, skipped)
    return 0
