"""`cubecast info CAPTURE [--json]`: what a capture file holds, for someone just handed one.

Two parts: `read_index(path)` is the file edge (it opens the file with CaptureReader, whose walk
over the records finds and counts the damage, and reads every payload once so that the reader
checks its CRC); `summarize(index)` is pure and turns what was read into one plain JSON-able dict
(the embedded sensor's figures as `Sensor.describe` gives them, frame count, sequences and gaps,
timing from the timestamps against the sensor's frame period, the reader's problem counts, the
ground truth, sizes). `format_info` writes that dict as text; `run` prints one or the other.

Which frames count where: every indexed record is a frame (`frames`); a copy of an earlier record
(the reader's `repeated`) is left out of the sequence and timing figures, since it holds no new
frame; a frame whose payload fails its CRC keeps its header (whose own CRC passed), so its sequence
and timestamp still count.
"""

from __future__ import annotations

import json
import os
from typing import Any, NamedTuple

import numpy as np

from .capture import RECORD_HEADER_SIZE, CaptureReader
from .errors import CubecastError, is_integer
from .sensor import parse_sensor

SENSOR_KEYS = ("sensor_id", "digest", "center_frequency_hz", "wavelength_m", "bandwidth_hz", "mimo_scheme", "n_tx",
               "n_rx", "chirps_per_frame", "loops_per_frame", "frame_period_s", "adc", "range_resolution_m",
               "max_range_m", "range_bins", "velocity_resolution_mps", "max_velocity_mps",
               "max_velocity_unfolded_mps")
"""The keys of `Sensor.describe()` that info shows (the figures are describe's, not derived again)."""

PROBLEM_LINES_SHOWN = 10
"""Problem lines the text shows (--json lists them all)."""


class CaptureIndex(NamedTuple):
    """What read_index found in one capture file: the header's fields and, per indexed frame, the
    index entries the reader keeps (no payloads)."""

    path: str
    size_bytes: int
    version: int
    created_utc: str | None
    sensor_toml: str
    metadata: dict
    ground_truth: Any
    sequences: list[int]
    timestamps_s: list[float]
    payload_nbytes: list[int]
    layouts: list[tuple[str, tuple[int, ...]]]  # (dtype name, shape) per frame
    repeat_of: dict[int, int]  # frame index -> the earlier frame it copies
    corrupt: list[int]  # frame indexes whose payload fails its CRC
    counts: dict[str, int]
    problems: list[str]


def read_index(path: str | os.PathLike, progress: bool = False) -> CaptureIndex:
    """Open `path`, index it and read each payload once (the reader checks its CRC-32). CubecastError
    naming the file for anything that is not a capture file (empty, bad magic, truncated header...)."""
    path = os.fspath(path)
    if os.path.isfile(path) and os.path.getsize(path) == 0:
        raise CubecastError(f"capture {path!r}: empty file (0 bytes), not a capture file")
    with CaptureReader(path, skip_corrupt=True) as r:
        frames = iter(r)
        if progress:
            from tqdm import tqdm
            frames = tqdm(frames, total=len(r), desc="info: checking payloads", unit="frame", leave=False,
                          disable=None)  # None: no bar unless standard error is a terminal
        readable = {f.index for f in frames}
        n = len(r)
        return CaptureIndex(
            path=path, size_bytes=os.path.getsize(path), version=r.version, created_utc=r.created_utc,
            sensor_toml=r.sensor_toml, metadata=r.metadata, ground_truth=r.ground_truth,
            sequences=[r.frame_sequence(i) for i in range(n)],
            timestamps_s=[r.frame_timestamp_s(i) for i in range(n)],
            payload_nbytes=[r.frame_nbytes(i) for i in range(n)],
            layouts=[(str(r.frame_dtype(i)), r.frame_shape(i)) for i in range(n)],
            repeat_of={i: r.repeat_of(i) for i in range(n) if r.repeat_of(i) is not None},
            corrupt=[i for i in range(n) if i not in readable],
            counts=r.counts, problems=r.problems)


def capture_info(path: str | os.PathLike, progress: bool = False) -> dict:
    """The summary of one capture file (see summarize)."""
    return summarize(read_index(path, progress))


def summarize(ix: CaptureIndex) -> dict:
    """Everything info reports, as plain JSON-able values with the unit in each name."""
    sensor, sensor_error = None, None
    try:
        sensor = parse_sensor(ix.sensor_toml, f"{ix.path} (embedded sensor description)")
    except CubecastError as exc:  # the frames are still worth describing; the error is reported in its place
        sensor_error = str(exc)
    distinct = [i for i in range(len(ix.sequences)) if i not in ix.repeat_of]
    n = len(ix.sequences)
    indexed_bytes = sum(RECORD_HEADER_SIZE + b for b in ix.payload_nbytes)
    return {
        "capture": ix.path,
        "format_version": ix.version,
        "created_utc": ix.created_utc,
        "metadata": ix.metadata,
        "sensor": None if sensor is None else sensor_summary(sensor),
        "sensor_error": sensor_error,
        "frames": n,
        "frames_distinct": len(distinct),
        "frames_repeated": len(ix.repeat_of),
        "frames_corrupt_payload": len(ix.corrupt),
        "frames_usable": len(set(distinct) - set(ix.corrupt)),
        "first_sequence": ix.sequences[0] if n else None,
        "last_sequence": ix.sequences[-1] if n else None,
        "payload_layouts": payload_layouts(ix.layouts, sensor),
        "timing": timing([ix.timestamps_s[i] for i in distinct], None if sensor is None else sensor.frame_period_s),
        "gaps": sequence_gaps([ix.sequences[i] for i in distinct], distinct),
        "reader_counts": dict(ix.counts),
        "problems": list(ix.problems),
        "ground_truth": truth_summary(ix.ground_truth),
        "file_size_bytes": ix.size_bytes,
        "file_header_bytes": ix.size_bytes - ix.counts["unindexed_bytes"] - indexed_bytes,
        "unindexed_bytes": ix.counts["unindexed_bytes"],
        "bytes_per_frame": indexed_bytes / n if n else None,
        "payload_bytes_per_frame": sum(ix.payload_nbytes) / n if n else None,
    }


def sensor_summary(sensor) -> dict:
    """The sensor's identity, shape and main figures, as `describe` computes them."""
    d = sensor.describe()
    chirp = {name: getattr(sensor, name) for name in ("start_frequency_hz", "samples_per_chirp")}
    return chirp | {k: d[k] for k in SENSOR_KEYS}


def payload_layouts(layouts: list[tuple[str, tuple[int, ...]]], sensor) -> list[dict]:
    """The distinct (dtype, shape) of the frames in order of first appearance, each with its frame count
    and what it is for the sensor: its ADC format ("adc"), the canonical complex64 frame ("canonical"),
    or neither ("other": such frames cannot be processed with this sensor)."""
    known = {}
    if sensor is not None:
        canon = (sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        known[(str(np.dtype("<c8")), canon)] = "canonical"
        known[(str(sensor.adc.raw_dtype()), sensor.adc.raw_shape(*canon))] = "adc"  # the ADC's, where both agree
    out: dict[tuple[str, tuple[int, ...]], dict] = {}
    for dtype, shape in layouts:
        entry = out.setdefault((dtype, shape), {"dtype": dtype, "shape": list(shape),
                                                "kind": known.get((dtype, shape), "other" if sensor is not None else None),
                                                "frames": 0})
        entry["frames"] += 1
    return list(out.values())


def timing(timestamps_s: list[float], nominal_period_s: float | None) -> dict:
    """Time span and frame rate from the timestamps of the distinct frames in file order. The mean rate
    is (frames - 1) / span: frames lost from the file lower it, the median interval does not."""
    t = np.asarray(timestamps_s, np.float64)
    d: dict[str, Any] = {"first_timestamp_s": float(t[0]) if t.size else None,
                         "last_timestamp_s": float(t[-1]) if t.size else None,
                         "time_span_s": float(t[-1] - t[0]) if t.size else None,
                         "frame_rate_hz": None, "median_interval_s": None, "min_interval_s": None,
                         "max_interval_s": None, "intervals_not_forward": 0,
                         "nominal_frame_period_s": nominal_period_s,
                         "nominal_frame_rate_hz": None if nominal_period_s is None else 1.0 / nominal_period_s,
                         "frame_rate_over_nominal": None}
    if t.size < 2:
        return d
    steps = np.diff(t)
    span = float(t[-1] - t[0])
    d.update(median_interval_s=float(np.median(steps)), min_interval_s=float(steps.min()),
             max_interval_s=float(steps.max()), intervals_not_forward=int((steps <= 0).sum()))
    if span > 0:
        d["frame_rate_hz"] = (t.size - 1) / span
        if nominal_period_s is not None:
            d["frame_rate_over_nominal"] = d["frame_rate_hz"] * nominal_period_s
    return d


def sequence_gaps(sequences: list[int], indexes: list[int]) -> dict:
    """Sequence numbers skipped between consecutive distinct frames (`indexes`: their frame indexes). A
    step backwards is no gap (the reader counts it as sequence_backwards)."""
    gaps = 0
    missing = 0
    largest = None
    for k in range(1, len(sequences)):
        lost = sequences[k] - sequences[k - 1] - 1
        if lost > 0:
            gaps += 1
            missing += lost
            if largest is None or lost > largest["frames_missing"]:
                largest = {"frames_missing": lost, "after_sequence": sequences[k - 1],
                           "before_sequence": sequences[k], "before_frame_index": indexes[k]}
    return {"gaps": gaps, "frames_missing": missing, "largest": largest}


def truth_summary(gt: Any) -> dict:
    """What the header's ground truth holds. The simulator's (files.ground_truth) is an object of
    `columns` (names), `targets` (names) and `frames` (per frame, one row per target); anything else
    is reported as present, of an unknown schema."""
    if gt is None:
        return {"present": False}
    keys = ("columns", "targets", "frames")
    if not (isinstance(gt, dict) and all(k in gt for k in keys)):
        return {"present": True, "schema": "unknown", "json_type": type(gt).__name__}
    columns, targets, frames = (gt[k] for k in keys)
    out = {"present": True, "schema": "simulated", "targets": targets, "columns": columns,
           "frames": len(frames) if isinstance(frames, list) else None, "malformed": None}
    if not (isinstance(columns, list) and all(isinstance(c, str) for c in columns)):
        out["malformed"] = "'columns' is not a list of names"
    elif not (isinstance(targets, list) and all(isinstance(c, str) for c in targets)):
        out["malformed"] = "'targets' is not a list of names"
    elif not isinstance(frames, list):
        out["malformed"] = "'frames' is not a list"
    else:
        bad = next((i for i, f in enumerate(frames) if not (
            isinstance(f, list) and len(f) == len(targets)
            and all(isinstance(row, list) and len(row) == len(columns) for row in f))), None)
        if bad is not None:
            out["malformed"] = (f"truth frame {bad} is not {len(targets)} rows of {len(columns)} values "
                                "(one row per target, one value per column)")
    out.update(_impairment_truth(gt))
    return out


def _impairment_truth(gt: dict) -> dict:
    """The simulator's impairment truth, when present: clipped samples summed over frames and RX,
    interference bursts (runs) counted over frames and RX, and the interferers' names."""
    out = {}
    clipped = gt.get("clipped_samples")
    if isinstance(clipped, list) and all(isinstance(r, list) and all(is_integer(c) for c in r) for r in clipped):
        out["clipped_samples"] = sum(sum(r) for r in clipped)
    itf = gt.get("interference")
    if isinstance(itf, dict) and isinstance(itf.get("frames"), list) and isinstance(itf.get("interferers"), list):
        out["interference_bursts"] = sum(len(f) for f in itf["frames"] if isinstance(f, list))
        out["interferers"] = [str(n) for n in itf["interferers"]]
    return out


# ---- text ---------------------------------------------------------------------------------------

def _ms(x: float) -> str:
    return f"{x * 1e3:.3f} ms"


def _sensor_rows(d: dict) -> list[tuple[str, str]]:
    s = d["sensor"]
    if s is None:
        return [("sensor", f"unreadable: {d['sensor_error']}")]
    adc = s["adc"]
    return [
        ("sensor", f"{s['sensor_id']} (digest {s['digest']}), carrier {s['start_frequency_hz'] / 1e9:.3f} GHz start, "
                   f"{s['center_frequency_hz'] / 1e9:.3f} GHz centre"),
        ("frame shape", f"{s['chirps_per_frame']} chirps ({s['loops_per_frame']} loops, {s['mimo_scheme'].upper()} "
                        f"{s['n_tx']} TX), {s['n_rx']} RX, {s['samples_per_chirp']} samples per chirp"),
        ("ADC format", f"{adc['sampling']} {adc['sample_type']}, full scale {adc['full_scale']:g}"
                       f"{', I/Q swapped' if adc['swap_iq'] else ''}{', conjugated' if adc['conjugate'] else ''}"),
        ("range", f"resolution {s['range_resolution_m']:.4f} m, maximum {s['max_range_m']:.2f} m"),
        ("velocity", f"resolution {s['velocity_resolution_mps']:.4f} m/s, maximum +-{s['max_velocity_mps']:.3f} m/s "
                     f"(unfolded +-{s['max_velocity_unfolded_mps']:.3f} m/s)"),
    ]


def _frame_rows(d: dict) -> list[tuple[str, str]]:
    if not d["frames"]:
        return [("frames", "none (the file holds only its header)")]
    extra = [f"{d[k]} {what}" for k, what in (("frames_repeated", "repeated"),
                                               ("frames_corrupt_payload", "with a corrupt payload")) if d[k]]
    rows = [("frames", f"{d['frames']} readable records{' (' + ', '.join(extra) + ')' if extra else ''}, "
                       f"sequences {d['first_sequence']} .. {d['last_sequence']}")]
    for lay in d["payload_layouts"]:
        kind = {"adc": "the sensor's ADC format", "canonical": "canonical complex frames",
                "other": "fits neither the sensor's ADC format nor its canonical frame", None: "sensor unknown"}
        rows.append(("payload", f"{lay['dtype']} {lay['shape']}: {kind[lay['kind']]} ({lay['frames']} frames)"))
    t = d["timing"]
    span = f"{t['time_span_s']:.6g} s (timestamps {t['first_timestamp_s']:.6g} .. {t['last_timestamp_s']:.6g} s)"
    rate = "n/a (fewer than two frames, or no time between them)" if t["frame_rate_hz"] is None else \
        f"{t['frame_rate_hz']:.4f} Hz mean"
    if t["nominal_frame_period_s"] is not None:
        rate += f" (nominal {t['nominal_frame_rate_hz']:.4f} Hz, frame period {_ms(t['nominal_frame_period_s'])})"
    rows += [("time span", span), ("frame rate", rate)]
    if t["median_interval_s"] is not None:
        back = f"; {t['intervals_not_forward']} not forward" if t["intervals_not_forward"] else ""
        rows.append(("frame interval", f"median {_ms(t['median_interval_s'])}, min {_ms(t['min_interval_s'])}, "
                                       f"max {_ms(t['max_interval_s'])}{back}"))
    g = d["gaps"]
    if g["gaps"]:
        big = g["largest"]
        rows.append(("sequence gaps", f"{g['frames_missing']} frames missing in {g['gaps']} gaps; the largest: "
                                      f"{big['frames_missing']} after sequence {big['after_sequence']} (before frame "
                                      f"index {big['before_frame_index']})"))
    else:
        rows.append(("sequence gaps", "none"))
    return rows


def _truth_text(gt: dict) -> str:
    if not gt["present"]:
        return "none"
    if gt["schema"] != "simulated":
        return f"present, not the simulator's schema (a JSON {gt['json_type']})"
    if gt["malformed"]:
        return f"the simulator's schema, malformed: {gt['malformed']}"
    text = (f"{len(gt['targets'])} targets ({', '.join(gt['targets'])}) over {gt['frames']} frames; columns "
            f"{', '.join(gt['columns'])}")
    if "clipped_samples" in gt:
        n = gt["clipped_samples"]
        text += f"; {n} clipped samples" if n else "; no sample clipped"
    if "interference_bursts" in gt:
        text += (f"; {gt['interference_bursts']} interference bursts (runs per chirp and RX) from "
                 f"{', '.join(gt['interferers'])}")
    return text


def format_info(d: dict) -> str:
    """The summary as aligned text lines."""
    meta = ", ".join(f"{k} {v}" if not isinstance(v, str) or len(v) <= 40 else f"{k} ({len(v)} characters)"
                     for k, v in d["metadata"].items())
    counts = {k: v for k, v in d["reader_counts"].items() if v}
    rows = [("capture", f"{d['capture']} (format version {d['format_version']}, created {d['created_utc']})"),
            ("metadata", meta or "none")]
    rows += _sensor_rows(d) + _frame_rows(d)
    rows.append(("problems", ", ".join(f"{k} {v}" for k, v in counts.items()) if counts else "none"))
    rows.append(("ground truth", _truth_text(d["ground_truth"])))
    size = f"{d['file_size_bytes']} bytes: header {d['file_header_bytes']}"
    if d["frames"]:
        size += f" + {d['frames']} frames x {d['bytes_per_frame']:.6g} bytes"
    rows.append(("file size", size + f" + {d['unindexed_bytes']} unindexed"))
    width = max(len(k) for k, _ in rows)
    lines = [f"{k:<{width}}  {v}" for k, v in rows]
    shown = d["problems"][:PROBLEM_LINES_SHOWN]
    lines += [f"  - {p}" for p in shown]
    if len(d["problems"]) > len(shown):
        lines.append(f"  ... {len(d['problems']) - len(shown)} more problem lines (--json lists all)")
    return "\n".join(lines)


# ---- command ------------------------------------------------------------------------------------

def run(args) -> int:
    from .logs import show_progress
    d = capture_info(args.capture, progress=show_progress())
    print(json.dumps(d, allow_nan=False) if args.json else format_info(d))
    return 0


def add_parser(subparsers):
    """Add the `info` subcommand to an argparse subparsers object; returns its parser."""
    p = subparsers.add_parser("info", help="what a capture file holds: sensor, frames, timing, gaps, damage, "
                                           "ground truth, sizes")
    p.add_argument("capture", help="capture file")
    p.add_argument("--json", action="store_true", help="print one JSON object (key names carry their units)")
    p.set_defaults(func=run)
    return p
