"""The live viewer: wire decoding with limits, the subscriber thread, the pure view functions, the
import boundary and the command line (offscreen renders: test_viewer_render.py).

The viewer reads only the wire format (README "Wire format"); the messages here are packed by hand from that
contract (tests/viewer_messages.py), so the tests hold the viewer to the document rather than to the
daemon's encoder.
"""

from __future__ import annotations

import logging
import math
import re
import subprocess
import sys
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import pytest

from cubecast.viewer import views as V
from cubecast.viewer.feed import (HEADER_MAX_BYTES, POINT_DTYPE, POINT_FIELDS, Feed, WireError, decode_parts,
                                  subscription_prefix)
from tests.viewer_messages import (SUMMARY, cloud, health_parts, points_parts, rdmap_parts, sensor_parts,
                                   view_parser)

ROOT = Path(__file__).resolve().parent.parent
YARD_CAP = ROOT / "replay_samples" / "yard.cap"

# ---- wire decoding -------------------------------------------------------------------------------

def test_point_layout_is_the_wires_and_the_chains():
    # README "Wire format": 8 + 8 + 12 * 4 = 64 bytes per record, fields in this order
    from cubecast.daemon.chain.points import RECORD_DTYPE
    assert POINT_DTYPE.itemsize == 80
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
# apply, written out here from README "Wire format" rather than read back from the module.

def test_idle_health_with_nil_latencies_is_shown():
    # README "Wire format": latency_p50_ms and latency_p99_ms are nil when serve processed nothing in the interval
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
    # README "Wire format": range of row i = start + i * step, velocity of column j likewise
    h = {"range_start_m": 0.3, "range_step_m": 0.4, "velocity_start_mps": -3.2, "velocity_step_mps": 0.2}
    x0, y0, sx, sy = V.rdmap_geometry(h)
    j, i = 5, 7
    assert np.isclose(x0 + (j + 0.5) * sx, -3.2 + j * 0.2) and np.isclose(y0 + (i + 0.5) * sy, 0.3 + i * 0.4)
    # 32 columns span 6.4 m/s: +4.0 m/s folds to -2.4 m/s, -3.3 (half a cell under the edge) stays
    f = V.fold_velocity([4.0, 0.0, -3.29, 3.09], -3.2, 0.2, 32)
    assert np.allclose(f, [-2.4, 0.0, -3.29, 3.09], atol=1e-5)
    lo, hi = V.rdmap_limits(np.array([[0.0, 41.0]]))
    assert lo < 0 and hi == 45.0


def test_rings_come_from_the_points_of_the_maps_frame():
    # README "Wire format": a map's seq is the sequence number of the ADC frame it was computed from,
    # the same number that frame's points carry; serve sends maps less often than points
    st = V.ViewerState()
    st.ingest(decode_parts(sensor_parts("s"), 0.0))
    for seq in (4, 5, 6):
        st.ingest(decode_parts(points_parts("s", seq, cloud({"y_m": 10.0 - seq})), 0.0))
        if seq == 4:
            st.ingest(decode_parts(rdmap_parts("s", np.zeros((8, 8), np.float32), seq=4), 0.0))
    assert st.points_msg["header"]["seq"] == 6
    assert np.allclose(st.map_points()["y_m"], 6.0)           # frame 4's point, not frame 6's
    st.ingest(decode_parts(rdmap_parts("s", np.zeros((8, 8), np.float32), seq=2), 0.0))
    assert st.map_points() is None                             # frame 2's points never came
    # the points of a frame are kept RECENT_FRAMES frames, then forgotten
    st.ingest(decode_parts(rdmap_parts("s", np.zeros((8, 8), np.float32), seq=6), 0.0))
    for seq in range(7, 7 + V.RECENT_FRAMES - 1):
        st.ingest(decode_parts(points_parts("s", seq, cloud({"y_m": 1.0})), 0.0))
    assert st.map_points() is not None and len(st.recent_points) == V.RECENT_FRAMES
    st.ingest(decode_parts(points_parts("s", 7 + V.RECENT_FRAMES, cloud({"y_m": 1.0})), 0.0))
    assert st.map_points() is None and len(st.recent_points) == V.RECENT_FRAMES
    # a new run (the source restarted, its seq from 0 again) forgets the old run's frames
    st.ingest(decode_parts(rdmap_parts("s", np.zeros((8, 8), np.float32), seq=7 + V.RECENT_FRAMES), 0.0))
    assert st.map_points() is not None
    st.ingest(decode_parts(points_parts("s", 0, cloud({"y_m": 1.0}), run="run-b"), 0.0))
    assert st.map_points() is None and list(st.recent_points) == [0]


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


def test_help_lists_the_keys_and_the_status_counters():
    text = V.help_text()
    for key in ("space", "c", "n", "h or ?", "q or Esc", "-  +", "[  ]", "click"):
        assert key in text
    assert "cubecast-view-DATE-TIME.png" in text          # where s saves
    assert re.search(r"skipped N +point frames this viewer never drew", text)
    assert re.search(r"dropped N +frames serve dropped", text)


def test_click_picks_the_nearest_point_and_the_cell_under_it():
    # the nearest candidate within the radius, the newest (last) of equally near ones
    assert V.nearest_pixel([(10, 10), (30, 10), (30, 10)], (28, 11)) == 2
    assert V.nearest_pixel([(10, 10)], (25, 10)) is None and V.nearest_pixel(np.zeros((0, 2)), (0, 0)) is None
    # README "Wire format": cell centres at start + index * step, so cell (i, j) spans half a step either side
    h = {"seq": 4, "range_start_m": 0.1, "range_step_m": 0.2, "velocity_start_mps": -1.0, "velocity_step_mps": 0.5}
    assert V.rd_cell_at(h, (10, 4), -1.24, 0.0) == (0, 0) and V.rd_cell_at(h, (10, 4), -0.74, 0.21) == (1, 1)
    assert V.rd_cell_at(h, (10, 4), -1.26, 0.0) is None and V.rd_cell_at(h, (10, 4), 0.0, 2.01) is None
    pts = cloud({"y_m": 1.0, "velocity_mps": 0.6, "sigma_range_m": 0.01}, {"y_m": 1.0, "velocity_mps": -0.4},
                {"y_m": 1.5, "velocity_mps": 0.6})
    # 4 columns span 2 m/s: +0.6 m/s is in column 3 (0.25 .. 0.75), -0.4 m/s folds there too (1.6 - 2.0)
    inside = V.points_in_rd_cell(pts, h, (10, 4), (5, 3))
    assert len(inside) == 1 and inside["velocity_mps"][0] == np.float32(0.6)
    msg = {"header": h, "data": np.full((10, 4), 12.5, np.float32)}
    lines = V.cell_lines(msg, (5, 3), pts)
    assert lines[0] == "RANGE-DOPPLER CELL · frame 4" and "range 1.00 … 1.20 m" in lines
    assert "level 12.5 dB over the noise floor" in lines and "points of frame 4 in this cell: 1" in lines
    assert "range 1.000 ± 0.01 m" in lines
    assert lines[-1] == "   CAPTURE --frame N --range-m 1.00 --velocity-mps 0.60"   # the point's numbers
    assert V.cell_lines(msg, (5, 3), None)[-1] == "points of frame 4: not received"


def test_a_points_lines_carry_its_numbers_and_sigmas():
    p = cloud({"x_m": -1.5, "y_m": 8.0, "z_m": 0.4, "velocity_mps": -2.25, "azimuth_deg": -10.6,
               "elevation_deg": 2.8, "snr_db": 27.0, "sigma_range_m": 0.004, "sigma_velocity_mps": 0.002,
               "sigma_azimuth_deg": 0.12, "sigma_elevation_deg": 0.5})[0]
    lines = V.point_lines(p, 17)
    assert lines == ["POINT · frame 17", f"range {float(p['range_m']):.3f} ± 0.004 m",
                     "radial velocity −2.250 ± 0.002 m/s", "azimuth −10.60 ± 0.12 °", "elevation 2.80 ± 0.5 °",
                     "SNR 27.0 dB per channel", "x −1.50  y 8.00  z 0.40 m"]


def test_served_map_is_pooled_to_the_wire_limits():
    # max-pooling reference: scipy.ndimage.maximum_filter over the pooling block, then subsampling
    from scipy.ndimage import maximum_filter
    from cubecast.daemon.chain.rdmap import pool_rdmap
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


def test_cli_rejects_bad_arguments(caplog, monkeypatch):
    # errors are logged (logs.configure stops propagation at the `cubecast` logger, before caplog's handler)
    monkeypatch.setattr(logging.getLogger("cubecast"), "propagate", True)
    caplog.set_level(logging.ERROR, logger="cubecast.viewer.cli")
    p = view_parser()
    with pytest.raises(SystemExit):
        p.parse_args(["view", "--size", "12x"])
    a = p.parse_args(["view", "--capture", str(YARD_CAP)])
    assert a.func(a) == 2 and "--snapshot" in caplog.records[-1].getMessage()
    a = p.parse_args(["view", "--snapshot", "x.png", "--frame", "3"])
    assert a.func(a) == 2 and "--capture" in caplog.records[-1].getMessage()
    assert all(r.levelno == logging.ERROR and r.name == "cubecast.viewer.cli" for r in caplog.records)


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
