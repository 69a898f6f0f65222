"""The live viewer: wire decoding with limits, the subscriber thread, the pure view functions, and
offscreen renders checked pixel by pixel.

The viewer reads only the wire format (notes/wire.md); the messages here are packed by hand from that
contract, so the tests hold the viewer to the document rather than to the daemon's encoder.
Offscreen tests need an EGL (or OSMesa) GL context; they are skipped only when none can be created.
"""

from __future__ import annotations

import argparse
import logging
import math
import re
import subprocess
import sys
import threading
import time
import tomllib
import zlib
from pathlib import Path

import msgpack
import numpy as np
import pytest

from cubecast.viewer import views as V
from cubecast.viewer.feed import (HEADER_MAX_BYTES, POINT_DTYPE, POINT_FIELDS, Feed, FeedSnapshot, WireError,
                         decode_parts, subscription_prefix)

ROOT = Path(__file__).resolve().parent.parent
YARD_CAP = ROOT / "replay_samples" / "yard.cap"
YARD_SCENE = ROOT / "replay_samples" / "yard_scene.toml"

SUMMARY = {"max_range_m": 20.0, "max_velocity_mps": 8.0, "fov_half_azimuth_deg": 60.0,
           "fov_half_elevation_deg": 20.0, "range_resolution_m": 0.2, "velocity_resolution_mps": 0.1}


# ---- messages packed by hand from wire.md ----------------------------------------------------------

def enc(sensor_id: str, kind: str, header: dict, payload: bytes = b"", wire=1) -> list[bytes]:
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


# ---- wire decoding -------------------------------------------------------------------------------

def test_point_layout_is_the_wires_and_the_chains():
    # wire.md: 8 + 8 + 12 * 4 = 64 bytes per record, fields in this order
    from cubecast.daemon.chain.points import RECORD_DTYPE
    assert POINT_DTYPE.itemsize == 64
    assert POINT_DTYPE == RECORD_DTYPE


def test_decode_points_round_trip():
    pts = cloud({"x_m": 1.5, "y_m": 7.0, "z_m": -0.5, "velocity_mps": -1.25})
    m = decode_parts(points_parts("yard-a", 4, pts), received_s=3.0)
    assert (m["sensor_id"], m["kind"], m["received_s"]) == ("yard-a", "points", 3.0)
    assert m["header"]["seq"] == 4
    assert m["data"].dtype == POINT_DTYPE and m["data"].shape == (1,)
    assert m["data"]["x_m"][0] == np.float32(1.5) and m["data"]["velocity_mps"][0] == np.float32(-1.25)


def _reason(parts) -> str:
    with pytest.raises(WireError) as ei:
        decode_parts(parts)
    return ei.value.reason


def test_decode_rejects_what_breaks_the_contract():
    pts = cloud({"x_m": 1.0, "y_m": 5.0})
    good = points_parts("a", 1, pts)
    assert _reason(good[:2]) == "malformed"                                   # 3 parts
    assert _reason(good + [b""]) == "malformed"
    assert _reason(points_parts("a", 1, pts)[:1] + [b"\xc1", good[2]]) == "malformed"  # not msgpack
    assert _reason([b"a/points", msgpack.packb([1, 2]), b""]) == "malformed"  # header not a map
    h = msgpack.unpackb(good[1])
    assert _reason([b"a/points", msgpack.packb({**h, "wire": 2}), good[2]]) == "wire_version"
    assert _reason([b"a/points", msgpack.packb({**h, "wire": True}), good[2]]) == "wire_version"
    assert _reason([b"b/points", good[1], good[2]]) == "malformed"            # sensor id differs
    assert _reason([b"a/rdmap", good[1], good[2]]) == "malformed"             # kind differs
    assert _reason([b"a/video", good[1], good[2]]) == "malformed"             # unknown kind
    assert _reason([b"a/points", good[1], good[2][:-1]]) == "shape"           # payload size
    assert _reason([b"a/points", msgpack.packb({**h, "count": 2}), good[2]]) == "shape"
    assert _reason([b"a/points", msgpack.packb({**h, "seq": True}), good[2]]) == "malformed"  # bool
    assert _reason([b"a/points", msgpack.packb({**h, "seq": -1}), good[2]]) == "malformed"
    assert _reason([b"a/points", msgpack.packb({**h, "timestamp_s": float("nan")}), good[2]]) == "malformed"
    swapped = [list(f) for f in POINT_FIELDS]
    swapped[2], swapped[3] = swapped[3], swapped[2]
    assert _reason([b"a/points", msgpack.packb({**h, "fields": swapped}), good[2]]) == "dtype"
    big = msgpack.packb({**h, "pad": "x" * HEADER_MAX_BYTES})
    assert _reason([b"a/points", big, good[2]]) == "oversized"
    # the sensor kind may carry up to 1 MiB of header (its TOML text)
    s = sensor_parts("a")
    hs = msgpack.unpackb(s[1])
    long_toml = msgpack.packb({**hs, "sensor_toml": "#" * (200 * 1024)})
    assert decode_parts([s[0], long_toml, b""])["kind"] == "sensor"
    assert _reason([s[0], msgpack.packb({**hs, "digest": "xyz"}), b""]) == "malformed"
    bad_summary = {**hs, "summary": {**SUMMARY, "max_range_m": "far"}}
    assert _reason([s[0], msgpack.packb(bad_summary), b""]) == "malformed"
    hh = health_parts("a")
    hd = msgpack.unpackb(hh[1])
    del hd["fps"]
    assert _reason([hh[0], msgpack.packb(hd), b""]) == "malformed"
    r = rdmap_parts("a", np.zeros((4, 8)))
    assert decode_parts(r)["data"].shape == (4, 8)
    assert _reason([r[0], r[1], r[2][:-4]]) == "shape"
    assert _reason(rdmap_parts("a", np.zeros((4, 8)), shape=[4, 0])) == "shape"
    assert _reason(rdmap_parts("a", np.zeros((4, 8)), shape=[4, -1])) == "malformed"
    assert _reason(rdmap_parts("a", np.zeros((4, 8)), range_step_m=0.0)) == "malformed"


# The viewer decodes with the daemon's wire module: the rules below are the ones serve and the workers
# apply, written out here from wire.md rather than read back from the module.

def test_idle_health_with_nil_latencies_is_shown():
    # wire.md: latency_p50_ms and latency_p99_ms are nil when serve processed nothing in the interval
    idle = decode_parts(health_parts("yard-a", latency_p50_ms=None, latency_p99_ms=None, fps=0.0), 0.0)
    assert idle["header"]["latency_p99_ms"] is None
    assert _reason(health_parts("yard-a", latency_p99_ms=-1.0)) == "malformed"
    st = V.ViewerState(endpoint="tcp://127.0.0.1:5602")
    st.ingest(decode_parts(points_parts("yard-a", 3, cloud({"y_m": 4.0})), 0.0))
    st.ingest(idle)
    text, level = V.status_line(st)
    assert level == "ok" and "latency 4.0 ms" in text and "p99" not in text and "0.0 fps" in text


def test_sensor_ids_follow_the_sensor_files_rule():
    # README, sensor file: `id` is made of letters, digits, '-', '_' and '.'; a '/' would end it in a topic
    pts = cloud({"x_m": 1.0, "y_m": 5.0})
    for good in ("yard-a", "Site_2.north"):
        assert decode_parts(points_parts(good, 1, pts))["sensor_id"] == good
    for bad in ("site/yard-a", "yard a", "a:b"):
        assert _reason(points_parts(bad, 1, pts)) == "malformed", bad


def test_seq_is_bounded_as_a_u64():
    # seq is the records' u64 `frame` field: 0..2^64-1, as the daemon and the workers bound it
    pts = cloud({"x_m": 1.0, "y_m": 5.0})
    top = (1 << 64) - 1
    assert decode_parts(points_parts("a", top, pts))["header"]["seq"] == top
    assert decode_parts(rdmap_parts("a", np.zeros((4, 8)), seq=top))["header"]["seq"] == top
    assert _reason(points_parts("a", -1, pts)) == "malformed"
    assert _reason(rdmap_parts("a", np.zeros((4, 8)), seq=-1)) == "malformed"


# ---- the subscriber thread (loopback only) ---------------------------------------------------------

def _wait(pred, timeout_s: float = 8.0, poll_s: float = 0.02) -> bool:
    t_end = time.monotonic() + timeout_s
    while time.monotonic() < t_end:
        if pred():
            return True
        time.sleep(poll_s)
    return pred()


@pytest.fixture
def pub():
    import zmq
    ctx = zmq.Context.instance()
    sock = ctx.socket(zmq.PUB)
    sock.setsockopt(zmq.LINGER, 0)
    port = sock.bind_to_random_port("tcp://127.0.0.1")
    yield sock, f"tcp://127.0.0.1:{port}", port
    sock.close(0)


def _send_until(sock, parts, feed, pred, timeout_s=8.0) -> bool:
    """PUB/SUB drops what is sent before the subscription reaches the publisher: repeat until seen."""
    t_end = time.monotonic() + timeout_s
    while time.monotonic() < t_end:
        sock.send_multipart(parts)
        if _wait(pred, 0.1):
            return True
    return False


def test_feed_keeps_latest_and_counts_bad_messages(pub):
    sock, endpoint, _ = pub
    with Feed(endpoint) as feed:
        assert _send_until(sock, sensor_parts("yard-a"), feed, lambda: "yard-a" in feed.snapshot().latest)
        good = points_parts("yard-a", 1, cloud({"x_m": 1.0, "y_m": 4.0}))
        h = msgpack.unpackb(good[1])
        sock.send_multipart([good[0], msgpack.packb({**h, "wire": 7}), good[2]])
        sock.send_multipart([good[0], b"\xc1\xc1", good[2]])
        sock.send_multipart(good[:2])
        sock.send_multipart([good[0], msgpack.packb({**h, "pad": "x" * (HEADER_MAX_BYTES + 1)}), good[2]])
        for seq in range(1, 51):
            sock.send_multipart(points_parts("yard-a", seq, cloud({"x_m": 1.0, "y_m": float(seq) / 5})))
        assert _wait(lambda: feed.snapshot().latest["yard-a"].get("points", {}).get("header", {}).get("seq") == 50)
        snap = feed.snapshot()
        assert snap.bad_by_reason == {"wire_version": 1, "malformed": 2, "oversized": 1}
        assert snap.counts["yard-a"]["points"] == 50
        # one slot per kind: only the newest cloud is held
        assert snap.latest["yard-a"]["points"]["data"]["y_m"][0] == np.float32(10.0)
        assert snap.idle_s() < 5.0 and snap.connected
        assert feed.error is None


def test_feed_survives_a_daemon_restart(pub):
    import zmq
    sock, endpoint, port = pub
    with Feed(endpoint) as feed:
        assert _send_until(sock, points_parts("a", 1, cloud({"y_m": 3.0}), run="first"), feed,
                           lambda: "a" in feed.snapshot().latest)
        sock.close(0)
        assert _wait(lambda: not feed.snapshot().connected, 5.0)
        time.sleep(0.3)
        assert feed.snapshot().idle_s() >= 0.3        # the GUI shows this as a stall
        again = zmq.Context.instance().socket(zmq.PUB)
        again.setsockopt(zmq.LINGER, 0)
        again.bind(f"tcp://127.0.0.1:{port}")
        try:
            ok = _send_until(again, points_parts("a", 1, cloud({"y_m": 6.0}), run="second"), feed,
                             lambda: feed.snapshot().latest["a"]["points"]["header"]["run"] == "second", 10.0)
            assert ok, "no message after the publisher came back"
            snap = feed.snapshot()
            assert snap.connected and snap.reconnects >= 1 and snap.idle_s() < 2.0
        finally:
            again.close(0)


def test_feed_subscribes_to_one_sensor_by_prefix(pub):
    sock, endpoint, _ = pub
    assert subscription_prefix(None) == "" and subscription_prefix("a") == "a/"
    with Feed(endpoint, sensor="a") as feed:
        assert _send_until(sock, points_parts("a", 1, cloud({"y_m": 3.0})), feed,
                           lambda: "a" in feed.snapshot().latest)
        for _ in range(5):
            sock.send_multipart(points_parts("ab", 1, cloud({"y_m": 3.0})))
            sock.send_multipart(points_parts("b", 1, cloud({"y_m": 3.0})))
        sock.send_multipart(points_parts("a", 2, cloud({"y_m": 3.0})))
        assert _wait(lambda: feed.snapshot().latest["a"]["points"]["header"]["seq"] == 2)
        assert set(feed.snapshot().latest) == {"a"}


def test_collect_from_sub_waits_bounded(pub):
    from cubecast.viewer.snapshot import collect_from_sub
    sock, endpoint, _ = pub
    stop = threading.Event()

    def publish():
        seq = 0
        while not stop.is_set():
            seq += 1
            sock.send_multipart(sensor_parts("a"))
            sock.send_multipart(points_parts("a", seq, cloud({"x_m": 1.0, "y_m": 5.0})))
            sock.send_multipart(rdmap_parts("a", np.zeros((8, 4)), seq))
            time.sleep(0.02)

    t = threading.Thread(target=publish)
    t.start()
    try:
        msgs, info = collect_from_sub(endpoint, None, wait_s=8.0, want_frames=3)
    finally:
        stop.set()
        t.join()
    kinds = [m["kind"] for m in msgs]
    assert kinds.count("points") >= 3 and "sensor" in kinds and "rdmap" in kinds
    t0 = time.monotonic()
    msgs, info = collect_from_sub("tcp://127.0.0.1:1", None, wait_s=0.3)   # nothing listens there
    assert msgs == [] and time.monotonic() - t0 < 3.0


# ---- pure view functions ---------------------------------------------------------------------------

def test_positions_are_sensor_frame_coordinates():
    # sensor frame (RULES.md): x right, y boresight, z up; top view (x, y), side view (y, z)
    pts = cloud({"x_m": 3.0, "y_m": 7.0, "z_m": 1.5}, {"x_m": -2.0, "y_m": 11.0, "z_m": -0.8})
    assert np.array_equal(V.bev_positions(pts), np.array([[3.0, 7.0], [-2.0, 11.0]], np.float32))
    assert np.array_equal(V.side_positions(pts), np.array([[7.0, 1.5], [11.0, -0.8]], np.float32))


def _hue_side(rgb) -> float:
    """> 0 for the warm (red) end, < 0 for the cool (blue) end."""
    return float(rgb[0] - rgb[2])


def test_velocity_colours_diverge_about_a_neutral_zero():
    # A diverging scheme puts the two signs on hues of opposite temperature with a light neutral at
    # the midpoint (Brewer, "Color use guidelines for data representation", Proc. ASA Section on
    # Statistical Graphics, 1999; from memory). Sign: positive radial velocity recedes (RULES.md).
    span = 2.5
    c = V.velocity_colors([-2.5, -1.0, -0.3, 0.0, 0.3, 1.0, 2.5, 9.0, -9.0], span)
    approaching, receding, zero = c[[0, 1, 2]], c[[4, 5, 6]], c[3]
    assert all(_hue_side(x) < -0.15 for x in approaching)
    assert all(_hue_side(x) > 0.15 for x in receding)
    assert np.ptp(zero[:3]) < 0.06 and zero[:3].mean() > 0.5          # grey, light on the dark panels
    assert np.allclose(c[7], c[6]) and np.allclose(c[8], c[0])        # clipped beyond the span
    # saturation (channel spread) grows with |v| on both sides
    spread = np.ptp(c[:, :3], axis=1)
    assert spread[3] < spread[2] < spread[0] and spread[3] < spread[4] < spread[6]
    assert c.shape == (9, 4) and np.all(c[:, 3] == 1.0)
    assert V.velocity_colors([], span).shape == (0, 4)


def test_snr_scale_and_sizes_are_monotonic():
    s = np.linspace(0, 60, 13)
    sizes = V.snr_sizes(s, 10.0, 45.0)
    assert np.all(np.diff(sizes) >= 0) and sizes[0] == 6.0 and sizes[-1] == 17.0
    lum = V.snr_colors(s, 10.0, 45.0)[:, :3] @ np.array([0.2126, 0.7152, 0.0722])  # Rec. 709 luma weights
    assert np.all(np.diff(lum) >= -1e-6) and lum[-1] > lum[0] + 0.4


def test_empty_cloud_gives_no_points():
    p = V.Persistence(5)
    p.push(np.zeros(0, POINT_DTYPE))
    m = p.merged()
    assert m.top.shape == (0, 2) and m.side.shape == (0, 2) and m.colors.shape == (0, 4) and m.sizes.shape == (0,)


def test_persistence_fades_and_is_bounded():
    p = V.Persistence(4)
    for k in range(10):
        p.push(cloud({"x_m": float(k), "y_m": 5.0}))
    m = p.merged()
    assert len(p) == 4 and m.top[:, 0].tolist() == [6.0, 7.0, 8.0, 9.0]      # oldest first, newest on top
    assert m.colors[-1, 3] == 1.0 and np.all(np.diff(m.colors[:, 3]) > 0)
    assert np.all(np.diff(m.sizes) > 0)
    p.set_frames(2)
    assert p.merged().top[:, 0].tolist() == [8.0, 9.0]


def test_nice_steps_are_1_2_5():
    # 1-2-5 tick steps (common practice for chart axes)
    assert V.nice_step(25.0, 5) == 5.0 and V.nice_step(20.0, 5) == 5.0 and V.nice_step(100.0, 5) == 20.0
    assert V.nice_step(3.0, 6) == 0.5 and V.nice_step(7.0, 5) == 2.0


def test_top_grid_rings_bearings_and_field_of_view():
    g = V.top_grid(25.0, 60.0)
    assert g.ring_step_m == 5.0 and g.bearing_step_deg == 15.0
    r = np.hypot(g.rings[:, 0], g.rings[:, 1])
    assert np.allclose(np.sort(np.unique(np.round(r, 4))), [5, 10, 15, 20, 25], atol=1e-3)
    # bearing lines run from the sensor to the range limit along azimuth = atan2(x, y) (RULES.md)
    ends = g.bearings[1::2]
    az = np.degrees(np.arctan2(ends[:, 0], ends[:, 1]))
    assert np.allclose(az, np.arange(-60, 61, 15), atol=1e-4)
    assert np.allclose(np.hypot(ends[:, 0], ends[:, 1]), 25.0, atol=1e-4)
    texts = [lab.text for lab in g.labels]
    assert {"-60°", "-45°", "0°", "+45°", "+60°", "5 m", "10 m", "20 m"} <= set(texts)
    # the field of view wedge: apex at the sensor, arc at the range limit within +-60 degrees
    arc_pts = g.fov_outline[1:-1]
    assert np.allclose(g.fov_outline[0], 0) and np.allclose(g.fov_outline[-1], 0)
    assert np.allclose(np.hypot(arc_pts[:, 0], arc_pts[:, 1]), 25.0, atol=1e-4)
    assert np.isclose(np.degrees(np.arctan2(arc_pts[0, 0], arc_pts[0, 1])), -60.0, atol=1e-4)
    x0, y0, w, h = g.extent
    assert x0 < -25 * math.sin(math.radians(60)) and x0 + w > 25 * math.sin(math.radians(60)) and y0 < 0 < y0 + h


def test_side_grid_ground_below_sensor_line():
    g = V.side_grid(20.0, 20.0, sensor_height_m=1.2)
    assert np.allclose(g.ground[:, 1], -1.2) and np.all(g.sensor_line[:, 1] == 0.0)
    # elevation = asin(z / r) (RULES.md); in the y-z plane that is atan2(z, y)
    up, down = g.fov_edges[1], g.fov_edges[3]
    assert np.isclose(math.degrees(math.atan2(up[1], up[0])), 20.0)
    assert np.isclose(math.degrees(math.atan2(down[1], down[0])), -20.0)
    assert np.isclose(down[1], -1.2)      # the lower edge stops where it meets the ground
    y0, z0, w, h = g.extent
    assert z0 < -1.2 and z0 + h >= 4.0


def test_rdmap_cells_and_folded_marks():
    # wire.md: range of row i = start + i * step, velocity of column j likewise
    h = {"range_start_m": 0.3, "range_step_m": 0.4, "velocity_start_mps": -3.2, "velocity_step_mps": 0.2}
    x0, y0, sx, sy = V.rdmap_geometry(h)
    j, i = 5, 7
    assert np.isclose(x0 + (j + 0.5) * sx, -3.2 + j * 0.2) and np.isclose(y0 + (i + 0.5) * sy, 0.3 + i * 0.4)
    # 32 columns span 6.4 m/s: +4.0 m/s folds to -2.4 m/s, -3.3 (half a cell under the edge) stays
    f = V.fold_velocity([4.0, 0.0, -3.29, 3.09], -3.2, 0.2, 32)
    assert np.allclose(f, [-2.4, 0.0, -3.29, 3.09], atol=1e-5)
    lo, hi = V.rdmap_limits(np.array([[0.0, 41.0]]))
    assert lo < 0 and hi == 45.0


def test_status_line_waiting_then_live_then_stalled():
    st = V.ViewerState(endpoint="tcp://127.0.0.1:5602")
    text, level = V.status_line(st)
    assert text.startswith("waiting for data on tcp://127.0.0.1:5602") and level == "wait"
    st.ingest(decode_parts(sensor_parts("yard-a"), 0.0))
    st.ingest(decode_parts(points_parts("yard-a", 7, cloud({"y_m": 4.0}, {"y_m": 5.0})), 0.0))
    st.ingest(decode_parts(health_parts("yard-a"), 0.0))
    text, level = V.status_line(st)
    assert level == "ok"
    for part in ("sensor yard-a", "frame 7", "10.0 fps", "latency 4.0 ms", "2 points", "dropped 2"):
        assert part in text
    st.idle_s = 5.0
    text, level = V.status_line(st)
    assert level == "stall" and text.startswith("STALLED: nothing for 5.0 s on tcp://127.0.0.1:5602")
    # another sensor's messages are not mixed in; a new run clears the trail
    assert not st.ingest(decode_parts(points_parts("other", 1, cloud({"y_m": 1.0})), 0.0))
    st.ingest(decode_parts(points_parts("yard-a", 1, cloud({"y_m": 4.0}), run="run-b"), 0.0))
    assert len(st.persist) == 1
    st.ingest(decode_parts(points_parts("yard-a", 4, cloud({"y_m": 4.0}), run="run-b"), 0.0))
    assert st.frames_skipped == 2


def test_help_lists_the_keys():
    text = V.help_text()
    for key in ("space", "c", "n", "h or ?", "q or Esc", "-  +", "[  ]"):
        assert key in text


def test_served_map_is_pooled_to_the_wire_limits():
    # max-pooling reference: scipy.ndimage.maximum_filter over the pooling block, then subsampling
    from scipy.ndimage import maximum_filter
    from cubecast.daemon.service import pool_rdmap
    rng = np.random.default_rng(3)
    power = rng.exponential(1.0, (256, 128)).astype(np.float32)
    power[150, 90] = 1e4
    db, r0, rstep, v0, vstep = pool_rdmap(power, range_bin_m=0.1, velocity_bin_mps=0.05)
    h = {"range_start_m": r0, "range_step_m": rstep, "velocity_start_mps": v0, "velocity_step_mps": vstep}
    assert db.shape == (128, 64)
    ref = maximum_filter(power.astype(np.float64), size=(2, 2), origin=(-1, -1))[::2, ::2]
    assert np.allclose(db, 10 * np.log10(ref / np.median(power)), atol=1e-4)
    i, j = np.unravel_index(np.argmax(db), db.shape)
    # the pooled peak's cell centre lies within half a pooled cell of the true bin
    true_range, true_vel = 150 * 0.1, (90 - 64) * 0.05
    assert abs(h["range_start_m"] + i * h["range_step_m"] - true_range) <= h["range_step_m"] / 2
    assert abs(h["velocity_start_mps"] + j * h["velocity_step_mps"] - true_vel) <= h["velocity_step_mps"] / 2
    assert abs(np.median(10 * np.log10(power / np.median(power)))) < 1e-6   # 0 dB is the median floor


# ---- import boundaries and the command line ------------------------------------------------------

def test_viewer_never_imports_the_daemon():
    # the wire module is the contract the viewer shares with the daemon: it alone may be imported
    for path in (ROOT / "viewer").glob("*.py"):
        text = path.read_text(encoding="utf-8")
        for line in re.findall(r"^\s*(?:from|import) .*$", text, re.M):
            if "daemon" in line:
                assert re.fullmatch(r"\s*from \.\.daemon(?: import wire|\.wire import \w+(?:, \w+)*)", line), \
                    f"{path.name}: {line.strip()}"
    code = ("import sys; import cubecast.viewer.feed, cubecast.viewer.views, cubecast.viewer.cli, "
            "cubecast.viewer.snapshot, cubecast.viewer.app; "
            "print(' '.join(sorted(m for m in sys.modules if m.startswith('cubecast.daemon') or m == 'vispy' "
            "or m.split('.')[0] == 'numba')))")
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    # exactly the wire module and the two small ones it needs; no numba, no chain, no service, no vispy
    assert r.stdout.split() == ["cubecast.daemon", "cubecast.daemon.errors", "cubecast.daemon.schema",
                                "cubecast.daemon.wire"], r.stdout
    # `cubecast view` registered by the daemon still loads neither vispy nor the chain
    code = ("import sys, argparse; from cubecast.daemon.viewsource import register_view; "
            "p = argparse.ArgumentParser(); register_view(p.add_subparsers()); "
            "assert 'vispy' not in sys.modules, 'vispy imported'; "
            "assert 'cubecast.daemon.chain.pipeline' not in sys.modules, 'chain imported'")
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr


def _view_parser():
    from cubecast.daemon.viewsource import register_view
    p = argparse.ArgumentParser(prog="cubecast")
    register_view(p.add_subparsers(dest="command"))
    return p


def test_cli_rejects_bad_arguments(caplog, monkeypatch):
    # errors are logged (logs.configure stops propagation at the `cubecast` logger, before caplog's handler)
    monkeypatch.setattr(logging.getLogger("cubecast"), "propagate", True)
    caplog.set_level(logging.ERROR, logger="cubecast.viewer.cli")
    p = _view_parser()
    with pytest.raises(SystemExit):
        p.parse_args(["view", "--size", "12x"])
    a = p.parse_args(["view", "--capture", str(YARD_CAP)])
    assert a.func(a) == 2 and "--snapshot" in caplog.records[-1].getMessage()
    a = p.parse_args(["view", "--snapshot", "x.png", "--frame", "3"])
    assert a.func(a) == 2 and "--capture" in caplog.records[-1].getMessage()
    assert all(r.levelno == logging.ERROR and r.name == "cubecast.viewer.cli" for r in caplog.records)


# ---- offscreen renders ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def canvas():
    from cubecast.viewer.snapshot import OffscreenUnavailable, offscreen_backend
    try:
        offscreen_backend()
    except OffscreenUnavailable as exc:
        pytest.skip(f"no offscreen GL context: {exc}")
    from cubecast.viewer.canvas import ViewerCanvas
    vc = ViewerCanvas(size=(1280, 800), show=False, dpi=96)
    yield vc
    vc.canvas.close()


def _render(vc, state) -> np.ndarray:
    vc.reset_cameras(state)
    vc.show_state(state)
    return vc.render()[..., :3].astype(int)


def _state(*messages, **kw) -> V.ViewerState:
    st = V.ViewerState(endpoint="tcp://127.0.0.1:5602", **kw)
    for parts in messages:
        st.ingest(decode_parts(parts, 0.0))
    return st


def _patch(img, px, r: int = 1) -> np.ndarray:
    c, rr = int(round(px[0])), int(round(px[1]))
    return np.median(img[rr - r: rr + r + 1, c - r: c + r + 1].reshape(-1, 3), axis=0)


def _is_approaching(rgb) -> bool:
    return rgb[2] - rgb[0] > 80


def _is_receding(rgb) -> bool:
    return rgb[0] - rgb[2] > 80


def _centroid(img, rect, pred) -> tuple[np.ndarray, int]:
    x0, y0, x1, y1 = rect
    sub = img[y0:y1, x0:x1]
    mask = pred(sub)
    ys, xs = np.nonzero(mask)
    if len(xs) == 0:
        return np.array([np.nan, np.nan]), 0
    return np.array([xs.mean() + x0, ys.mean() + y0]), len(xs)


def _blue(sub):
    return (sub[..., 2] - sub[..., 0] > 80) & (sub[..., 2] > 150)


def _orange(sub):
    return (sub[..., 0] - sub[..., 2] > 80) & (sub[..., 0] > 150)


def test_offscreen_points_land_where_they_belong(canvas):
    a = {"x_m": -6.0, "y_m": 8.0, "z_m": 2.0, "velocity_mps": -2.0}   # approaching, above the sensor
    b = {"x_m": 6.0, "y_m": 16.0, "z_m": -0.5, "velocity_mps": 2.0}   # receding, below it
    st = _state(sensor_parts("s"), points_parts("s", 1, cloud(a, b)))
    img = _render(canvas, st)
    for panel, pa, pb in (("top", (-6, 8), (6, 16)), ("side", (8, 2), (16, -0.5))):
        rect = canvas.panel_rect(panel)
        pix_a, pix_b = canvas.data_to_pixel(panel, [pa, pb])
        assert _is_approaching(_patch(img, pix_a)), (panel, _patch(img, pix_a))
        assert _is_receding(_patch(img, pix_b)), (panel, _patch(img, pix_b))
        # the drawn blobs' centres, found in the pixels alone, sit on the mapped positions
        ca, na = _centroid(img, rect, _blue)
        cb, nb = _centroid(img, rect, _orange)
        assert na > 20 and nb > 20
        assert np.hypot(*(ca - pix_a)) < 2.0 and np.hypot(*(cb - pix_b)) < 2.0
        # equal scales on both axes (aspect 1): the pixel offset has the metric offset's proportions,
        # with image rows growing downward
        d = cb - ca
        dm = np.subtract(pb, pa)
        assert d[0] > 0 and np.sign(d[1]) == -np.sign(dm[1])
        assert abs(abs(d[0] / d[1]) - abs(dm[0] / dm[1])) < 0.04 * abs(dm[0] / dm[1])
    # the top view's x = 0 line (boresight) lies between the two points, at the sensor mark
    origin = canvas.data_to_pixel("top", [(0.0, 0.0)])[0]
    white = _centroid(img, canvas.panel_rect("top"),
                      lambda s: (s.min(axis=-1) > 200))[0]
    assert abs(white[0] - origin[0]) < 2.0


def test_offscreen_empty_cloud_draws_no_points(canvas):
    base = _render(canvas, _state(sensor_parts("s")))
    empty = _render(canvas, _state(sensor_parts("s"), points_parts("s", 1, np.zeros(0, POINT_DTYPE))))
    one = _render(canvas, _state(sensor_parts("s"), points_parts("s", 1, cloud({"x_m": 0.0, "y_m": 10.0}))))
    for panel in ("top", "side"):
        x0, y0, x1, y1 = canvas.panel_rect(panel)
        assert np.array_equal(empty[y0:y1, x0:x1], base[y0:y1, x0:x1]), panel
        assert not np.array_equal(one[y0:y1, x0:x1], base[y0:y1, x0:x1]), panel
        for pred in (_blue, _orange):
            assert pred(empty[y0:y1, x0:x1]).sum() == 0


def _yard_truth(name: str) -> tuple[float, float, float]:
    scene = tomllib.loads(YARD_SCENE.read_text(encoding="utf-8"))
    return tuple(next(t["position_m"] for t in scene["target"] if t["name"] == name))


@pytest.fixture(scope="module")
def yard_messages():
    from cubecast.daemon.viewsource import capture_messages
    return capture_messages(str(YARD_CAP), 5, history=6)


def test_offscreen_yard_header_beam_is_plainly_overhead(canvas, yard_messages):
    kinds = [m["kind"] for m in yard_messages]
    assert kinds[0] == "sensor" and kinds.count("points") == 6 and "rdmap" in kinds and kinds[-1] == "health"
    st = V.ViewerState(endpoint=str(YARD_CAP), sensor_height_m=1.0)   # yard_scene.toml: ground at z = -1
    for m in yard_messages:
        st.ingest(m)
    img = _render(canvas, st)
    x, y, z = _yard_truth("door header beam west")
    assert z > 3.0
    beam = canvas.data_to_pixel("side", [(y, z)])[0]
    ground = canvas.data_to_pixel("side", [(y, -1.0)])[0]
    lit = _patch(img, beam, 2)
    # stationary: the neutral colour of the velocity scale, bright on the dark panel
    assert np.ptp(lit) < 45 and lit.mean() > 140, lit
    # the ground line is drawn at z = -1 in its earth colour, far below the beam
    col = img[int(ground[1]) - 2: int(ground[1]) + 3, int(ground[0])]
    assert any(c[0] - c[2] > 40 and c[0] > 100 for c in col), col
    px_per_m = canvas.data_to_pixel("side", [(0, 0), (0, 1)])
    px_per_m = abs(px_per_m[0, 1] - px_per_m[1, 1])
    assert ground[1] - beam[1] > 0.9 * (z + 1.0) * px_per_m > 60
    # the walker comes toward the sensor: d(range)/dt < 0, drawn on the approaching side of the scale
    wx, wy, wz = _yard_truth("walker")
    scene = tomllib.loads(YARD_SCENE.read_text(encoding="utf-8"))
    wv = next(t["velocity_mps"] for t in scene["target"] if t["name"] == "walker")
    assert (wx * wv[0] + wy * wv[1]) / math.hypot(wx, wy) < 0
    newest = st.persist.newest
    k = int(np.argmin(np.hypot(newest["x_m"] - (wx + 5 * 0.1 * wv[0]), newest["y_m"] - (wy + 5 * 0.1 * wv[1]))))
    wpix = canvas.data_to_pixel("top", [(float(newest["x_m"][k]), float(newest["y_m"][k]))])[0]
    assert _is_approaching(_patch(img, wpix)) or _patch(img, wpix)[2] > _patch(img, wpix)[0] + 40
    # the range-Doppler panel shows the map with rings on this frame's detections
    assert canvas.rd_image.visible and canvas.rd_marks.visible


def test_app_keys_pause_step_and_stall(canvas):
    from cubecast.viewer.app import ViewerApp

    class FakeFeed:
        endpoint = "tcp://127.0.0.1:5999"

        def __init__(self):
            self.snap = FeedSnapshot(endpoint=self.endpoint, started_s=time.monotonic())

        def put(self, parts):
            m = decode_parts(parts)
            self.snap.latest.setdefault(m["sensor_id"], {})[m["kind"]] = m
            c = self.snap.counts.setdefault(m["sensor_id"], {})
            c[m["kind"]] = c.get(m["kind"], 0) + 1
            self.snap.last_message_s = m["received_s"]

        def snapshot(self):
            return self.snap

        def stop(self):
            pass

    feed = FakeFeed()
    app = ViewerApp(feed, canvas=canvas, show=False, stall_after_s=3.0)
    app.tick()
    assert canvas.status.text.startswith("waiting for data on tcp://127.0.0.1:5999")
    feed.put(sensor_parts("s"))
    feed.put(points_parts("s", 1, cloud({"x_m": 1.0, "y_m": 6.0})))
    app.tick()
    assert app.state.points_msg["header"]["seq"] == 1 and canvas.top_points.visible
    app.handle_key("Space", " ")
    feed.put(points_parts("s", 2, cloud({"x_m": 1.0, "y_m": 6.5})))
    app.tick()
    assert app.state.points_msg["header"]["seq"] == 1 and canvas.status.text.startswith("PAUSED")
    app.handle_key("Right")
    app.tick()
    assert app.state.points_msg["header"]["seq"] == 2
    feed.put(points_parts("s", 3, cloud({"x_m": 1.0, "y_m": 7.0})))
    app.tick()
    assert app.state.points_msg["header"]["seq"] == 2
    app.handle_key("Space", " ")
    app.tick()
    assert app.state.points_msg["header"]["seq"] == 3 and app.state.frames_skipped == 0
    app.handle_key("c", "c")
    assert app.state.color_by == "snr"
    app.handle_key("+", "+")
    app.handle_key("]", "]")
    assert app.state.persist.n_frames == 9 and app.state.velocity_span_mps == 5.0
    before = canvas.render()[..., :3].astype(int)
    app.handle_key("h", "h")
    assert canvas.help_visible
    after = canvas.render()[..., :3].astype(int)
    h, w = after.shape[:2]
    centre = (slice(h // 2 - 100, h // 2 + 100), slice(w // 2 - 250, w // 2 + 250))
    assert np.abs(after[centre] - before[centre]).sum(axis=-1).astype(bool).mean() > 0.3
    app.handle_key("?", "?")
    assert not canvas.help_visible
    feed.snap.last_message_s = time.monotonic() - 10.0
    app.tick(now_s=time.monotonic())
    assert canvas.status.text.startswith("STALLED: nothing for")


def test_cli_snapshot_of_the_bundled_capture(tmp_path, canvas):
    out = tmp_path / "yard.png"
    p = _view_parser()
    a = p.parse_args(["view", "--snapshot", str(out), "--capture", str(YARD_CAP), "--frame", "3",
                      "--size", "960x600"])
    assert a.func(a) == 0
    data = out.read_bytes()
    # PNG signature and IHDR (PNG specification, W3C 2003): width, height, 8-bit RGB
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    assert int.from_bytes(data[16:20], "big") == 960 and int.from_bytes(data[20:24], "big") == 600
    assert data[24] == 8 and data[25] == 2
    assert zlib.crc32(data[12:29]) == int.from_bytes(data[29:33], "big")


def test_ground_line_follows_the_sensor_mount_height():
    # The side view's ground sits mount_height_m below the sensor (sensor description -> wire summary),
    # unless the command line says otherwise.
    from cubecast.daemon.sensor import load_sensor
    from cubecast.daemon.wire import encode_sensor
    from cubecast.viewer.feed import decode_parts
    from tests.helpers import YARD_SENSOR
    sensor = load_sensor(YARD_SENSOR)
    assert sensor.mount_height_m == 1.0
    msg = decode_parts([bytes(p) for p in encode_sensor(sensor)])
    st = V.ViewerState()
    assert st.ground_height_m == V.DEFAULT_SENSOR_HEIGHT_M  # nothing known yet
    st.ingest(msg)
    assert st.ground_height_m == 1.0
    msg["header"]["summary"]["mount_height_m"] = 2.5
    assert st.ground_height_m == 2.5
    assert V.ViewerState(sensor_height_m=0.4, sensor_msg=msg).ground_height_m == 0.4
