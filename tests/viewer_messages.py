"""Viewer test messages packed by hand from the wire contract (README "Wire format"),
so the viewer's tests hold it to the document rather than to the daemon's encoder; and the `view`
command's parser as the daemon registers it."""

from __future__ import annotations

import argparse
import math

import msgpack
import numpy as np

from cubecast.viewer.feed import POINT_DTYPE, POINT_FIELDS

SUMMARY = {"max_range_m": 20.0, "max_velocity_mps": 8.0, "fov_half_azimuth_deg": 60.0,
           "fov_half_elevation_deg": 20.0, "range_resolution_m": 0.2, "velocity_resolution_mps": 0.1,
           "pose": {"position_m": [0.0, 0.0, 0.0], "yaw_deg": 0.0, "pitch_deg": 0.0, "roll_deg": 0.0}}


def enc(sensor_id: str, kind: str, header: dict, payload: bytes = b"", wire=3) -> list[bytes]:
    h = {"wire": wire, "kind": kind, "sensor_id": sensor_id}
    h.update(header)
    return [f"{sensor_id}/{kind}".encode(), msgpack.packb(h, use_bin_type=True), payload]


def cloud(*rows: dict) -> np.ndarray:
    pts = np.zeros(len(rows), POINT_DTYPE)
    for i, r in enumerate(rows):
        for k, v in r.items():
            pts[i][k] = v
        if "range_m" not in r:
            pts[i]["range_m"] = math.sqrt(pts[i]["x_m"] ** 2 + pts[i]["y_m"] ** 2 + pts[i]["z_m"] ** 2)
        if "snr_db" not in r:
            pts[i]["snr_db"] = 30.0
        for axis in "xyz":  # no pose: the platform frame is the sensor frame
            if f"platform_{axis}_m" not in r:
                pts[i][f"platform_{axis}_m"] = pts[i][f"{axis}_m"]
    return pts


def points_parts(sensor_id: str, seq: int, pts: np.ndarray, run: str = "run-a") -> list[bytes]:
    return enc(sensor_id, "points", {"seq": seq, "run": run, "timestamp_s": 0.1 * seq, "latency_s": 0.004,
                                     "count": len(pts), "fields": [list(f) for f in POINT_FIELDS]},
               pts.tobytes())


def sensor_parts(sensor_id: str, summary: dict = SUMMARY) -> list[bytes]:
    return enc(sensor_id, "sensor", {"digest": "0123456789abcdef", "sensor_toml": "[sensor]\nid = 'x'\n",
                                     "summary": summary})


def health_parts(sensor_id: str, **over) -> list[bytes]:
    h = {"uptime_s": 12.0, "frames_received": 120, "frames_processed": 118, "frames_dropped": 2,
         "frames_rejected": 0, "rejected": {}, "sequence_gaps": 0, "source_restarts": 0,
         "latency_p50_ms": 6.5, "latency_p99_ms": 9.0, "queue_depth": 0, "cpu_share": 0.4,
         "points_last": 7, "fps": 10.0}
    h.update(over)
    return enc(sensor_id, "health", h)


def rdmap_parts(sensor_id: str, db: np.ndarray, seq: int = 1, **over) -> list[bytes]:
    h = {"seq": seq, "timestamp_s": 0.1, "shape": list(db.shape), "dtype": "<f4", "range_start_m": 0.0,
         "range_step_m": 0.2, "velocity_start_mps": -3.2, "velocity_step_mps": 0.2, "unit": "dB"}
    h.update(over)
    return enc(sensor_id, "rdmap", h, db.astype("<f4").tobytes())



def view_parser():
    from cubecast.daemon.viewsource import register_view
    p = argparse.ArgumentParser(prog="cubecast")
    register_view(p.add_subparsers(dest="command"))
    return p
