"""The live viewer drawn offscreen and checked pixel by pixel: points where they belong, colours by
velocity, the bundled capture's scene, the window's keys, and the PNG written by `view --snapshot`.

Offscreen tests need an EGL (or OSMesa) GL context; without one they fail (DEVELOPERS.md "Testing"
names the Mesa packages).
"""

from __future__ import annotations

import math
import time
import tomllib
import zlib
from pathlib import Path

import numpy as np
import pytest

from cubecast.viewer import views as V
from cubecast.viewer.feed import POINT_DTYPE, FeedSnapshot, decode_parts
from tests.viewer_messages import SUMMARY, cloud, points_parts, rdmap_parts, sensor_parts, view_parser

ROOT = Path(__file__).resolve().parent.parent
YARD_CAP = ROOT / "replay_samples" / "yard.cap"
YARD_SCENE = ROOT / "replay_samples" / "yard_scene.toml"


@pytest.fixture(scope="module")
def canvas():
    from cubecast.viewer.snapshot import OffscreenUnavailable, offscreen_backend
    try:
        offscreen_backend()
    except OffscreenUnavailable as exc:
        pytest.fail(f"no offscreen GL context: {exc}")
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


class FakeFeed:
    """A Feed's interface without a socket: `put` decodes one message into the latest-value slots."""
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


def test_app_keys_pause_step_and_stall(canvas):
    from cubecast.viewer.app import ViewerApp

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
    p = view_parser()
    a = p.parse_args(["view", "--snapshot", str(out), "--capture", str(YARD_CAP), "--frame", "3",
                      "--size", "960x600"])
    assert a.func(a) == 0
    data = out.read_bytes()
    # PNG signature and IHDR (PNG specification, W3C 2003): width, height, 8-bit RGB
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    assert int.from_bytes(data[16:20], "big") == 960 and int.from_bytes(data[20:24], "big") == 600
    assert data[24] == 8 and data[25] == 2
    assert zlib.crc32(data[12:29]) == int.from_bytes(data[29:33], "big")


# ---- the range-Doppler rings belong to the map's own frame ------------------------------------------

def _rose(sub):
    """The detection ring's colour (views.DETECTION_RING, rose), which no map or point colour comes near."""
    return (sub[..., 0] > 200) & (sub[..., 1] < 140) & (sub[..., 2] > 100) & (sub[..., 2] < 215)


VAN_SUMMARY = dict(SUMMARY, max_range_m=19.2, max_velocity_mps=24.0)


def _van_messages(map_seq: int | None) -> list[list[bytes]]:
    """A van approaching at 11 m/s (1.1 m a frame at 10 frames per second), with points in frames 10,
    11 and 12 and, when map_seq is 10, the map of frame 10 with its blob where that frame's point is.
    The map is published after its frame's points (as serve does) and frames 11 and 12 come before the
    next map, which serve sends at most 5 times a second."""
    ranges = {10: 13.4, 11: 12.3, 12: 11.2}
    out = [sensor_parts("s", VAN_SUMMARY)]
    for seq, r in ranges.items():
        out.append(points_parts("s", seq, cloud({"x_m": 0.0, "y_m": r, "velocity_mps": -11.0})))
        if seq == map_seq:
            out.append(_van_map(seq, r))
    return out


def _van_map(seq: int, blob_range_m: float | None) -> list[bytes]:
    """0.2 m x 0.5 m/s cells, velocity -8 .. +7.5 m/s: -11 m/s folds to +5 m/s (span 16 m/s)."""
    db = np.zeros((96, 32), np.float32)
    if blob_range_m is not None:
        db[int(round(blob_range_m / 0.2)), int(round((5.0 + 8.0) / 0.5))] = 30.0
    return rdmap_parts("s", db, seq=seq, range_step_m=0.2, velocity_start_mps=-8.0, velocity_step_mps=0.5)


def test_rings_mark_the_points_of_the_maps_own_frame(canvas, tmp_path):
    from cubecast.viewer.snapshot import write_png
    st = _state(*_van_messages(10))
    assert st.points_msg["header"]["seq"] == 12 and st.rdmap_msg["header"]["seq"] == 10
    img = _render(canvas, st)
    write_png(tmp_path / "rings.png", img.astype(np.uint8))
    rect = canvas.panel_rect("rd")
    blob = canvas.data_to_pixel("rd", [(5.0, 13.4)])[0]
    newest = canvas.data_to_pixel("rd", [(5.0, 11.2)])[0]
    ring, n = _centroid(img, rect, _rose)
    # one ring (a circle of 13 px), centred on the map's blob of frame 10, not on frame 12's point
    assert n > 20 and np.hypot(*(ring - blob)) < 2.0, (ring, blob)
    x0, y0, _, _ = rect
    near_newest = _rose(img[int(newest[1]) - 9: int(newest[1]) + 10, int(newest[0]) - 9: int(newest[0]) + 10])
    assert near_newest.sum() == 0
    # the blob itself is drawn where its cell is: the panel's brightest pixel lies within the cell
    cell_px = np.abs(canvas.data_to_pixel("rd", [(0.0, 0.0), (0.5, 0.2)])[1] - canvas.data_to_pixel(
        "rd", [(0.0, 0.0)])[0])
    sub = img[y0:rect[3], x0:rect[2]].sum(axis=-1)
    by, bx = np.unravel_index(np.argmax(sub), sub.shape)
    assert abs(bx + x0 - blob[0]) <= cell_px[0] / 2 + 1 and abs(by + y0 - blob[1]) <= cell_px[1] / 2 + 1
    assert canvas.rd_sub.text == "frame 10 · rings: its 1 point"


def test_no_rings_when_the_maps_frame_points_are_gone(canvas):
    # frames 10..12 with points, and a map of frame 7, whose points never came: no rings at all
    st = _state(*_van_messages(None), _van_map(7, 13.4))
    assert st.map_points() is None
    img = _render(canvas, st)
    assert canvas.rd_image.visible and not canvas.rd_marks.visible
    x0, y0, x1, y1 = canvas.panel_rect("rd")
    assert _rose(img[y0:y1, x0:x1]).sum() == 0
    assert canvas.rd_sub.text == "frame 7 · its points not received: no rings"


# ---- a click shows the numbers of a point or a map cell ---------------------------------------------

class _Mouse:
    """The two fields of a vispy mouse event the viewer reads."""

    def __init__(self, pos, button=1):
        self.pos, self.button = pos, button


def test_click_shows_a_points_or_a_cells_numbers(canvas, tmp_path, monkeypatch):
    from cubecast.viewer.app import ViewerApp
    feed = FakeFeed()
    app = ViewerApp(feed, canvas=canvas, show=False)
    msgs = _van_messages(10)
    for parts in msgs[:3]:                        # sensor, frame 10's points and its map
        feed.put(parts)
        app.tick()
    for parts in msgs[3:]:                        # frames 11 and 12, one tick each
        feed.put(parts)
        app.tick()
    canvas.reset_cameras(app.state)
    canvas.render()
    # frame 12's point in the top view (x 0, y 11.2): its numbers, with the frame it belongs to
    lines = app.click(canvas.data_to_pixel("top", [(0.0, 11.2)])[0] + (3, -2))
    assert lines[0] == "POINT · frame 12" and lines[1].startswith("range 11.200 ± ") and lines[1].endswith(" m")
    assert any(l.startswith("radial velocity −11.000 ± ") for l in lines)
    assert canvas.info_box.visible
    img = canvas.render()[..., :3].astype(int)
    x0, y0, x1, y1 = canvas.panel_rect("rd")
    # the panel sits in the lower left of the range-Doppler map, framed in the ring's rose
    low_left = img[y1 - 240: y1, x0: x0 + 220]
    assert _rose(low_left).sum() > 100
    # the map's ring of frame 10 on the map: that frame's point
    lines = app.click(canvas.data_to_pixel("rd", [(5.0, 13.4)])[0])
    assert lines[0] == "POINT · frame 10" and lines[1].startswith("range 13.400")
    # an empty map cell: the cell's extent and level, and that frame 10 has no point in it
    lines = app.click(canvas.data_to_pixel("rd", [(-5.0, 3.0)])[0])
    assert lines[0] == "RANGE-DOPPLER CELL · frame 10"
    assert "range 2.90 … 3.10 m" in lines and "level 0.0 dB over the noise floor" in lines
    assert "points of frame 10 in this cell: 0" in lines
    # a drag is a pan, not a click; a click on empty space closes the panel
    empty = canvas.data_to_pixel("top", [(-12.0, 2.0)])[0]
    app._on_mouse_press(_Mouse(empty))
    app._on_mouse_release(_Mouse(empty + (40, 0)))
    assert canvas.info_box.visible
    app._on_mouse_press(_Mouse(empty))
    app._on_mouse_release(_Mouse(empty + (1, 1)))
    assert not canvas.info_box.visible and app.state.selection is None
    # s saves the window to the current folder and says where in the footer
    monkeypatch.chdir(tmp_path)
    app.handle_key("s", "s")
    saved = tmp_path / app.saved[-1]
    assert saved.exists() and saved.name.startswith("cubecast-view-") and saved.suffix == ".png"
    assert canvas.footer_text.text == f"saved {saved}"
