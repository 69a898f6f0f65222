"""The viewer's platform picture: several sensors on one bus drawn in one top and side view, each
point at its platform-frame position, each sensor at its pose with its field of view turned.

References: the rotation convention is the sensor file's [pose] (README "Sensor description"),
checked here by hand-worked positions (a sensor turned 90 degrees right looks along platform +x;
common practice for a yaw measured clockwise seen from above, as azimuth) and against scipy's
Rotation (scipy.spatial.transform, SciPy 1.x documentation), which composes intrinsic rotations
with upper-case axis letters. Offscreen tests need an EGL (or OSMesa) GL context and fail without one.
"""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from cubecast.viewer import views as V
from cubecast.viewer.feed import decode_parts
from tests.viewer_messages import SUMMARY, cloud, points_parts, sensor_parts

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "replay_samples"


def _summary(position, yaw=0.0, pitch=0.0, roll=0.0, **over) -> dict:
    s = dict(SUMMARY)
    s["pose"] = {"position_m": list(position), "yaw_deg": yaw, "pitch_deg": pitch, "roll_deg": roll}
    s.update(over)
    return s


def _state(*messages, **kw) -> V.ViewerState:
    st = V.ViewerState(endpoint="tcp://127.0.0.1:5602", **kw)
    for parts in messages:
        st.ingest(decode_parts(parts, 0.0))
    return st


# ---- geometry, by hand and against scipy ----------------------------------------------------------

def test_a_sensor_turned_right_looks_along_platform_x():
    # at (1, 2, 0.5), yaw +90 deg: its boresight (sensor +y) is the platform's +x, so the middle of
    # its field-of-view arc at range R sits at (1 + R, 2, 0.5); the arc's ends at +-60 deg azimuth are
    # R * (cos 60, -+sin 60) from it (worked by hand)
    place = V.sensor_place("a", _summary((1.0, 2.0, 0.5), yaw=90.0, max_range_m=10.0), 0)
    wedge = V.fov_wedge_platform(place, n=49)
    assert np.allclose(wedge[0], [1.0, 2.0, 0.5]) and np.allclose(wedge[-1], [1.0, 2.0, 0.5])
    assert np.allclose(wedge[1 + 24], [11.0, 2.0, 0.5], atol=1e-9)
    assert np.allclose(wedge[1], [1.0 + 10 * math.cos(math.radians(60)), 2.0 + 10 * math.sin(math.radians(60)), 0.5])
    assert np.allclose(wedge[-2], [1.0 + 10 * math.cos(math.radians(60)), 2.0 - 10 * math.sin(math.radians(60)), 0.5])


def test_pitch_tilts_the_elevation_edges_up():
    # pitched up by 10 deg with a +-20 deg elevation field: the edges leave at +30 and -10 deg
    place = V.sensor_place("a", _summary((0.0, 0.0, 1.0), pitch=10.0, max_range_m=20.0,
                                         fov_half_elevation_deg=20.0), 0)
    e = V.elevation_edges_platform(place)
    up, down = e[1] - e[0], e[3] - e[2]
    assert math.degrees(math.atan2(up[2], up[1])) == pytest.approx(30.0, abs=1e-9)
    assert math.degrees(math.atan2(down[2], down[1])) == pytest.approx(-10.0, abs=1e-9)
    assert np.allclose(e[0], [0.0, 0.0, 1.0])


def test_the_viewers_rotation_is_scipys_intrinsic_zxy():
    # scipy's 'ZXY' (intrinsic) with angles (-yaw, pitch, roll): our yaw turns clockwise seen from
    # above (as azimuth), scipy's positive z rotation counter-clockwise
    rng = np.random.default_rng(7)
    for _ in range(20):
        yaw, pitch, roll = rng.uniform(-180, 180), rng.uniform(-90, 90), rng.uniform(-180, 180)
        _, rot = V.pose_of(_summary((0, 0, 0), yaw, pitch, roll))
        ref = Rotation.from_euler("ZXY", [-yaw, pitch, roll], degrees=True).as_matrix()
        assert np.allclose(rot, ref, atol=1e-12)


def test_platform_grid_covers_every_sensors_field_and_the_origin():
    a = V.sensor_place("a", _summary((0.0, 3.0, 1.2), max_range_m=20.0), 0)
    b = V.sensor_place("b", _summary((1.0, 2.0, 1.0), yaw=120.0, max_range_m=20.0), 1)
    g = V.platform_grid([a, b], ground_z_m=0.0)
    x0, y0, w, h = g.extent_top
    for place in (a, b):
        wedge = V.fov_wedge_platform(place)
        assert (wedge[:, 0] >= x0).all() and (wedge[:, 0] <= x0 + w).all()
        assert (wedge[:, 1] >= y0).all() and (wedge[:, 1] <= y0 + h).all()
    assert x0 < 0 < x0 + w and y0 < 0 < y0 + h
    # b looks back and to the right: its wedge reaches behind the platform origin
    assert V.fov_wedge_platform(b)[:, 1].min() < -5.0
    assert np.allclose(g.marks_top, [[0.0, 3.0], [1.0, 2.0]]) and np.allclose(g.marks_side, [[3.0, 1.2], [2.0, 1.0]])
    assert [lab.text for lab in g.labels_top] == ["sensor a", "sensor b"]
    # grid lines sit on multiples of the step
    segs = g.grid.reshape(-1, 2, 2).astype(np.float64)
    vertical = segs[:, 0, 0] == segs[:, 1, 0]
    horizontal = segs[:, 0, 1] == segs[:, 1, 1]
    assert (vertical | horizontal).all() and vertical.sum() >= 3 and horizontal.sum() >= 3
    for v in np.concatenate([segs[vertical, 0, 0], segs[horizontal, 0, 1]]) / g.step_m:
        assert abs(v - round(v)) < 1e-5


# ---- the state: which messages are kept -----------------------------------------------------------

def _two_sensor_messages():
    pa = cloud({"x_m": 0.0, "y_m": 10.0, "z_m": 0.0, "platform_x_m": 0.0, "platform_y_m": 13.0, "platform_z_m": 1.2,
                "velocity_mps": -1.0})
    pb = cloud({"x_m": 0.0, "y_m": 8.0, "z_m": 0.0, "platform_x_m": 9.0, "platform_y_m": 2.0, "platform_z_m": 1.0,
                "velocity_mps": 1.0})
    return [sensor_parts("front", _summary((0.0, 3.0, 1.2), max_range_m=20.0, mount_height_m=1.2)),
            sensor_parts("side", _summary((1.0, 2.0, 1.0), yaw=90.0, max_range_m=20.0)),
            points_parts("front", 1, pa), points_parts("side", 1, pb)], pa, pb


def test_the_sensor_frame_shows_one_sensor_the_platform_frame_every_sensor():
    msgs, pa, pb = _two_sensor_messages()
    one = _state(*msgs)
    assert one.sensor_ids() == ["front"] and one.others == {}
    styled, _ = one.styled()
    assert np.allclose(styled.top, [[0.0, 10.0]])               # sensor-frame x, y
    every = _state(*msgs, frame="platform")
    assert every.sensor_ids() == ["front", "side"] and every.sensor_id == "front"
    styled, edge = every.styled()
    assert np.allclose(styled.top, [[0.0, 13.0], [9.0, 2.0]])    # platform-frame x, y
    assert np.allclose(styled.side, [[13.0, 1.2], [2.0, 1.0]])   # platform-frame y, z
    assert np.allclose(edge[:, :3], [V.SENSOR_COLORS[0], V.SENSOR_COLORS[1]])
    assert [p.sensor_id for p in every.places()] == ["front", "side"]
    # the ground is the shown sensor's platform height less its height above the ground
    assert every.platform_ground_z_m == pytest.approx(0.0)
    # the shown sensor's map and health; the others' points only
    assert every.points_msg["sensor_id"] == "front"
    text, _ = V.status_line(every)
    assert text.startswith("platform frame, 2 sensors  ·  map and health of front")


def test_colour_by_sensor_and_persistence_of_the_others():
    msgs, pa, pb = _two_sensor_messages()
    st = _state(*msgs, frame="platform", color_by="sensor")
    styled, _ = st.styled()
    assert np.allclose(styled.colors[:, :3], [V.SENSOR_COLORS[0], V.SENSOR_COLORS[1]])
    st.set_persist_frames(2)
    for seq in (2, 3, 4):
        st.ingest(decode_parts(points_parts("side", seq, pb), 0.0))
    assert len(st.others["side"].persist) == 2 and st.others["side"].persist.n_frames == 2
    # a restarted source (a new run) forgets the old run's clouds
    st.ingest(decode_parts(points_parts("side", 0, pb, run="run-b"), 0.0))
    assert len(st.others["side"].persist) == 1
    # a click's panel names the sensor and gives both frames
    lines = V.point_lines(pb[0], 4, "side")
    assert lines[0] == "POINT · sensor side · frame 4"
    assert lines[-1] == "platform x 9.00  y 2.00  z 1.00 m" and "x 0.00  y 8.00  z 0.00 m" in lines


# ---- drawn offscreen -------------------------------------------------------------------------------

# the module-scoped offscreen canvas (fails without a GL context) and the pixel patch reader
from tests.test_viewer_render import _patch, canvas  # noqa: E402,F401


def test_offscreen_platform_picture_puts_each_sensor_and_point_at_its_place(canvas):
    msgs, pa, pb = _two_sensor_messages()
    st = _state(*msgs, frame="platform", color_by="sensor")
    canvas.reset_cameras(st)
    canvas.show_state(st)
    img = canvas.render()[..., :3].astype(int)
    for panel, marks, pts in (("top", [(0.0, 3.0), (1.0, 2.0)], [(0.0, 13.0), (9.0, 2.0)]),
                              ("side", [(3.0, 1.2), (2.0, 1.0)], [(13.0, 1.2), (2.0, 1.0)])):
        for k, (m, p) in enumerate(zip(marks, pts)):
            hue = np.array(V.SENSOR_COLORS[k]) * 255
            mark_px, point_px = canvas.data_to_pixel(panel, [m, p])
            if panel == "top":   # in the side view the second mark lies under the first one's edges
                assert np.abs(_patch(img, mark_px) - hue).max() < 30, (panel, k, _patch(img, mark_px))
            assert np.abs(_patch(img, point_px) - hue).max() < 30, (panel, k, _patch(img, point_px))
    assert canvas.plat_grid.visible and not canvas.rings.visible and canvas.plat_fov.visible
    assert canvas.top_sub.text.startswith("platform frame · grid")
    # back in the sensor frame: one sensor, its rings, at sensor-frame positions
    st1 = _state(*msgs)
    canvas.reset_cameras(st1)
    canvas.show_state(st1)
    img = canvas.render()[..., :3].astype(int)
    assert canvas.rings.visible and not canvas.plat_grid.visible
    px = canvas.data_to_pixel("top", [(0.0, 10.0)])[0]
    assert np.abs(_patch(img, px) - np.array([0.12, 0.70, 0.95]) * 255).max() < 60   # approaching hue


def test_app_key_p_switches_to_the_platform_picture(canvas):
    from cubecast.viewer.app import ViewerApp
    from tests.test_viewer_render import FakeFeed

    feed = FakeFeed()
    app = ViewerApp(feed, canvas=canvas, show=False)
    msgs, _, _ = _two_sensor_messages()
    for parts in msgs:
        feed.put(parts)
    app.tick()
    assert app.state.frame == "sensor" and app.state.sensor_ids() == ["front"]
    app.handle_key("p", "p")
    assert app.state.frame == "platform" and app.state.sensor_ids() == ["front", "side"]
    assert canvas.status.text.startswith("platform frame, 2 sensors")
    for want in ("snr", "sensor", "velocity"):
        app.handle_key("c", "c")
        assert app.state.color_by == want
    app.handle_key("c", "c")
    app.handle_key("c", "c")
    assert app.state.color_by == "sensor"
    app.handle_key("n", "n")
    assert app.state.sensor_id == "side" and app.state.frame == "platform"
    assert app.state.sensor_ids() == ["front", "side"]
    app.handle_key("p", "p")
    assert app.state.frame == "sensor" and app.state.color_by == "velocity" and app.state.sensor_ids() == ["side"]


def _simulate(tmp_path, name: str) -> Path:
    from cubecast.daemon.files import simulate_capture
    from cubecast.daemon.scene import load_scene
    from cubecast.daemon.sensor import load_sensor
    out = tmp_path / f"{name}.cap"
    simulate_capture(load_sensor(SAMPLES / f"tractor_{name}_sensor.toml"), load_scene(SAMPLES / "tractor_scene.toml"),
                     out, frames=3)
    return out


def test_cli_platform_snapshot_of_two_captures_and_its_refusals(tmp_path, canvas):
    front, right = _simulate(tmp_path, "front"), _simulate(tmp_path, "right")
    png = tmp_path / "two.png"
    cmd = [sys.executable, "-m", "cubecast.daemon.cli", "view", "--snapshot", str(png), "--size", "960x600"]
    out = subprocess.run(cmd + ["--capture", str(front), "--capture", str(right), "--platform"],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert "sensor tractor-front, tractor-right" in out.stdout
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    bad = subprocess.run(cmd + ["--capture", str(front), "--capture", str(right)], capture_output=True, text=True,
                         timeout=120)
    assert bad.returncode == 2 and "add --platform" in bad.stderr and "Traceback" not in bad.stderr
    same = subprocess.run(cmd + ["--capture", str(front), "--capture", str(front), "--platform"],
                          capture_output=True, text=True, timeout=300)
    assert same.returncode == 2 and "one capture per sensor" in same.stderr and "Traceback" not in same.stderr
    col = subprocess.run(cmd + ["--capture", str(front), "--color", "sensor"], capture_output=True, text=True,
                         timeout=120)
    assert col.returncode == 2 and "--color sensor applies to --platform only" in col.stderr


def test_the_bundled_tractor_scene_is_seen_at_the_same_place_by_both_sensors(tmp_path):
    # the walker (platform (5, 9, 1.1) at t = 0, 1.08 m/s) is in both sensors' fields of view: each
    # sensor's detection of it, taken to the platform frame by the chain, lands on the truth and on
    # the other's within 5 sigma of the reported range and azimuth sigmas (horizontal position
    # sigma: sqrt(sigma_r^2 + (r sigma_az)^2), common practice), plus the walker's motion during the
    # frame's chirps (the frame's timestamp is its first chirp)
    from cubecast.daemon.capture import CaptureReader
    from cubecast.daemon.chain.pipeline import Pipeline
    from cubecast.daemon.chain.points import to_records
    from cubecast.daemon.files import capture_sensor, iter_capture_frames
    near, sigmas = [], []
    for name in ("front", "right"):
        with CaptureReader(_simulate(tmp_path, name)) as reader:
            sensor = capture_sensor(reader)
            pipe = Pipeline(sensor)
            seq, ts, canon = next(iter(iter_capture_frames(reader, sensor)))
            rec = to_records(pipe.process(canon), seq, ts)
        assert ts == 0.0
        motion_m = math.hypot(-0.9, -0.6) * sensor.chirps_per_frame * sensor.chirp_period_s
        xy = np.stack([rec["platform_x_m"], rec["platform_y_m"]], 1).astype(np.float64)
        d = np.hypot(xy[:, 0] - 5.0, xy[:, 1] - 9.0)
        k = int(np.argmin(d))
        p = rec[k]
        sigma = math.hypot(float(p["sigma_range_m"]), float(p["range_m"]) * math.radians(float(p["sigma_azimuth_deg"])))
        assert d[k] < 5.0 * sigma + motion_m, (name, d[k], sigma)
        near.append(xy[k])
        sigmas.append(sigma)
    assert np.hypot(*(near[0] - near[1])) < 5.0 * math.hypot(*sigmas) + motion_m
