"""File edges: simulated captures, capture -> canonical frames, point-cloud output files."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Iterator

import numpy as np

from .capture import CaptureReader, CaptureWriter
from .errors import CubecastError
from .scene import Scene
from .sensor import Sensor, parse_sensor
from .simulate import BURST_COLUMNS, TRUTH_COLUMNS, Simulator, count_clipped

SIMULATED_EPOCH_UTC = "2026-01-01T00:00:00+00:00"  # fixed so that a simulated capture is reproducible
HELD_FRAMES_BYTES = 256 * 1024 * 1024  # frames simulated for the truth are kept up to this, else made again


def ground_truth(sim: Simulator, frames: int, clipped: list | None = None, bursts: list | None = None) -> dict:
    """The simulated capture's ground truth: targets per frame (TRUTH_COLUMNS at each measurement
    epoch); with `clipped` ([frame][rx] counts), "clipped_samples"; with `bursts` ([frame] of
    [n, 4] arrays), "interference" (BURST_COLUMNS runs where the interference exceeds the noise rms)."""
    gt = {
        "columns": list(TRUTH_COLUMNS),
        "targets": [t.name for t in sim.scene.targets],
        "frames": [sim.truth(i).round(9).tolist() for i in range(frames)],
    }
    if clipped is not None:
        gt["clipped_samples"] = [[int(c) for c in row] for row in clipped]
    if bursts is not None:
        gt["interference"] = {"interferers": [i.name for i in sim.scene.interferers], "columns": list(BURST_COLUMNS),
                              "threshold_counts": sim.sensor.noise_rms_counts,
                              "frames": [b.tolist() for b in bursts]}
    return gt


def simulate_capture(sensor: Sensor, scene: Scene, out: str | Path, frames: int, seed: int = 0,
                     quantize: bool = True, progress: bool = False) -> None:
    """Write `frames` simulated frames: in the sensor's ADC format (quantised and clipped) or, with
    quantize=False, as canonical complex64. The frames are made before the file's header (which
    holds the truth: clipped samples per frame and RX, counted on the payload written, and the
    interference bursts); "clipped_samples" is in the truth when a sample clipped or the scene has
    an interferer or [impairments] (absent: nothing clipped), "interference" when it has an interferer."""
    if frames < 1:
        raise CubecastError(f"--frames {frames}: must be at least 1")
    sim = Simulator(sensor, scene, seed=seed)
    meta = {"source": "simulated", "scene_toml": scene.source_text, "seed": seed,
            "payload": "adc" if quantize else "canonical"}
    make = sim.raw_frame if quantize else sim.frame
    it = range(frames)
    if progress:
        from tqdm import tqdm
        it = tqdm(it, desc="simulate", unit="frame")
    held, clipped, bursts, held_bytes = {}, [], [], 0
    for i in it:
        payload = make(i)
        clipped.append(count_clipped(sensor, payload))
        if scene.interferers:
            bursts.append(sim.interference_bursts(i))
        if held_bytes + payload.nbytes <= HELD_FRAMES_BYTES:
            held[i], held_bytes = payload, held_bytes + payload.nbytes
    show_clipped = scene.impaired or any(c.any() for c in clipped)
    truth = ground_truth(sim, frames, clipped if show_clipped else None, bursts if scene.interferers else None)
    with CaptureWriter(out, sensor.source_text, truth, meta, created_utc=SIMULATED_EPOCH_UTC) as w:
        for i in range(frames):
            payload = held.pop(i) if i in held else make(i)
            w.write(payload, sequence=i, timestamp_s=sim.frame_time_s(i))


def capture_sensor(reader: CaptureReader) -> Sensor:
    return parse_sensor(reader.sensor_toml, f"{reader.path} (embedded sensor description)")


def to_canonical(sensor: Sensor, payload: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """A capture or wire payload in the sensor's ADC format, or already canonical complex64."""
    canon = (sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
    if payload.dtype == np.complex64 and payload.shape == canon and not (
            sensor.adc.is_complex and sensor.adc.sample_type == "float32"
            and (sensor.adc.swap_iq or sensor.adc.conjugate)):
        if out is None:
            return payload
        out[...] = payload
        return out
    return sensor.raw_to_canonical(payload, out)


def iter_capture_frames(reader: CaptureReader, sensor: Sensor, first: int = 0,
                        stop: int | None = None) -> Iterator[tuple[int, float, np.ndarray]]:
    """(sequence, timestamp_s, canonical frame) for each readable frame, in order (of the frame indexes
    first..stop-1 only, if given). The frame buffer is reused: copy it to keep it."""
    buf = np.empty((sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp), np.complex64)
    for f in reader.frames(first, stop):
        try:
            yield f.sequence, f.timestamp_s, to_canonical(sensor, f.payload, buf)
        except CubecastError as exc:
            raise CubecastError(f"{reader.path} frame {f.index}: {exc}") from None


def write_points_csv(path: str | Path, records: list[np.ndarray]) -> int:
    """CSV with the columns of RECORD_DTYPE; returns the number of points written."""
    from .chain.points import RECORD_DTYPE
    names = RECORD_DTYPE.names
    n = 0
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        f.write(",".join(names) + "\n")
        for rec in records:
            for row in rec:
                f.write(f"{int(row['frame'])},{float(row['timestamp_s']):.6f}," + ",".join(
                    _fmt(float(row[k])) for k in names[2:]) + "\n")
                n += 1
    return n


def _fmt(v: float) -> str:
    return "nan" if math.isnan(v) else f"{v:.6g}"


def write_points_npz(path: str | Path, records: list[np.ndarray]) -> int:
    from .chain.points import RECORD_DTYPE
    allrec = np.concatenate(records) if records else np.empty(0, RECORD_DTYPE)
    np.savez(path, **{name: allrec[name] for name in RECORD_DTYPE.names})
    return int(allrec.shape[0])
