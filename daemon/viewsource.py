"""Glue between the chain and the viewer: a capture file, processed, as the wire messages the viewer
reads, and the `view` subcommand's registration.

This is the one module that imports both `daemon` and `viewer`. It runs frames 0..N of a capture
through the Pipeline, packs each result as README "Wire format" describes (points, rdmap, the front
end's monitor, sensor and a health-like status) and decodes them again with the viewer's own
decoder, so a snapshot from a capture passes the same validation as live data.
"""

from __future__ import annotations

import time
import zlib

import numpy as np

from .errors import CubecastError


def register_view(subparsers) -> None:
    """Add `cubecast view` to the daemon's argparse subcommands (viewer.cli, with --capture wired here)."""
    from ..viewer.cli import register
    register(subparsers, capture_snapshot=snapshot_capture)


def capture_messages(capture_path: str, frame: int | None = None, settings_path: str | None = None,
                     history: int = 8) -> list[dict]:
    """Process frames 0..frame of a capture; the wire messages of the last `history` frames (points),
    the last frame's rdmap and front-end monitor (with serve's warnings), the sensor description and a
    health-like status with the front end's summary, decoded by the viewer.
    `frame` None means the capture's last frame."""
    from ..viewer.feed import POINT_FIELDS, decode_parts

    from . import wire
    from .capture import CaptureReader
    from .chain.pipeline import Pipeline
    from .chain.points import RECORD_DTYPE, to_records
    from .files import capture_sensor, iter_capture_frames
    from .frontendwarn import FrontendSummary, frontend_warnings
    from .settings import load_settings

    if RECORD_DTYPE.descr != [(n, d) for n, _, d in POINT_FIELDS]:
        raise CubecastError("the chain's point record layout differs from the wire's (viewer.feed.POINT_FIELDS)")
    with CaptureReader(capture_path) as reader:
        n = len(reader)
        if n == 0:
            raise CubecastError(f"{capture_path}: the capture holds no frames")
        last = n - 1 if frame is None else frame
        if not 0 <= last < n:
            raise CubecastError(f"--frame {frame}: the capture has frames 0..{n - 1}")
        sensor = capture_sensor(reader)
        settings = load_settings(settings_path) if settings_path else None
        pipe = Pipeline(sensor, settings)
        sid = sensor.sensor_id
        run = f"capture-{zlib.crc32(str(capture_path).encode()) & 0xFFFFFFFF:08x}"
        raw: list[list[bytes]] = []
        latencies, stamps = [], []
        rd = fe = None
        fs = sensor.adc.full_scale
        summary = FrontendSummary(sensor.n_rx)
        for k, (seq, ts, canon) in enumerate(iter_capture_frames(reader, sensor)):
            if k > last:
                break
            t0 = time.perf_counter()
            pts = pipe.process(canon)
            rec = to_records(pts, seq, ts)
            latency = time.perf_counter() - t0
            latencies.append(latency)
            stamps.append(ts)
            warnings = frontend_warnings(pipe.frontend, fs)
            summary.add(pipe.frontend, warnings)
            if k >= last - history + 1:
                raw.append(wire.encode_points(sid, int(seq), run, float(ts), float(latency), rec))
            if k == last:
                rd = wire.encode_rdmap(sid, int(seq), float(ts), *pipe.display_map())
                fe = wire.encode_frontend(sid, int(seq), run, float(ts), pipe.frontend, fs,
                                          [w.as_map() for w in warnings])
        processed = len(latencies)
        lat_ms = np.array(latencies[1:] or latencies) * 1e3  # the first frame includes compilation
        span_s = stamps[-1] - stamps[0] if len(stamps) > 1 else 0.0
        health = wire.encode_health(sid, {
            "uptime_s": float(span_s), "frames_received": processed, "frames_processed": processed,
            "frames_dropped": 0, "frames_rejected": 0, "rejected": {}, "sequence_gaps": 0,
            "source_restarts": 0, "latency_p50_ms": float(np.percentile(lat_ms, 50)),
            "latency_p99_ms": float(np.percentile(lat_ms, 99)), "queue_depth": 0, "cpu_share": 0.0,
            "points_last": int(len(rec)), "fps": float((processed - 1) / span_s) if span_s > 0 else 0.0,
            "frontend": summary.health()})
        sensor_msg = wire.encode_sensor(sensor, pipe.settings.velocity_unfolding)
    now = time.monotonic()
    ordered = [sensor_msg] + raw + [rd, fe, health]
    return [decode_parts([bytes(part) for part in p], now) for p in ordered]


def snapshot_capture(capture_path, frame: int | None, out_png: str, size=(1280, 800), **options) -> dict:
    """Render frames 0..frame of a capture as the viewer shows them; returns a short description.
    `capture_path` may be a list of captures of different sensors (drawn together in the platform
    frame; the first one's map and status are shown)."""
    from ..viewer.snapshot import render_snapshot
    history = int(options.get("persist_frames", 8))
    settings_path = options.pop("settings_path", None)
    paths = [capture_path] if isinstance(capture_path, (str, bytes)) or not hasattr(capture_path, "__iter__") \
        else list(capture_path)
    per_capture = [capture_messages(p, frame, settings_path, history) for p in paths]
    ids = [m[0]["sensor_id"] for m in per_capture]
    for k, sid in enumerate(ids):
        if sid in ids[:k]:
            raise CubecastError(f"--capture {paths[k]}: sensor '{sid}' is also the sensor of {paths[ids.index(sid)]}; "
                                f"the platform picture needs one capture per sensor")
    # the first capture's messages last, so that its map and health are the ones shown
    msgs = [m for ms in per_capture[1:] for m in ms] + per_capture[0]
    points = [m for m in per_capture[0] if m["kind"] == "points"]
    names = " + ".join(str(p) for p in paths)
    footer = f"capture{'s' if len(paths) > 1 else ''} {names}, frames 0..{points[-1]['header']['seq']} processed offline"
    render_snapshot(msgs, out_png, size, endpoint=names, sensor_id=ids[0], footer=footer, **options)
    return {"frames": len(points), "points": int(points[-1]["header"]["count"]), "sensor_id": ", ".join(ids)}
