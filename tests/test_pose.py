"""The sensor's pose on its platform: the [pose] section, platform-frame points, platform-frame scenes.

The frames are the project's (README "Conventions"): x right, y forward (the sensor's boresight), z
up, in the sensor frame and in the platform frame alike. The pose turns the boresight right by yaw
(about the platform's z), then up by pitch (about the sensor's x), then lowers the sensor's right
side by roll (about its boresight): intrinsic z-x'-y'' Tait-Bryan angles (common practice). The
transforms below are worked by hand in the comments, and checked against scipy's rotations
(scipy.spatial.transform.Rotation, a reference library: right-handed angles, so a rightward yaw is a
negative rotation about z).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.cli import main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sensor import parse_sensor, pose_rotation
from cubecast.daemon.settings import ProcessingSettings
from cubecast.daemon.simulate import TRUTH_COLUMNS, Simulator
from cubecast.daemon.wire import decode, encode_sensor
from tests.helpers import YARD_SENSOR, sensor_text

POSE = "\n[pose]\nposition_m = [{x}, {y}, {z}]\nyaw_deg = {yaw}\npitch_deg = {pitch}\nroll_deg = {roll}\n"


def posed(x=0.0, y=0.0, z=0.0, yaw=0.0, pitch=0.0, roll=0.0, **kw):
    return parse_sensor(sensor_text(extra=POSE.format(x=x, y=y, z=z, yaw=yaw, pitch=pitch, roll=roll), **kw), "test")


def test_rotation_hand_worked_cases():
    # yaw 90: the boresight (0, 1, 0) turns right onto the platform's +x; the sensor's right (+x) onto -y
    r = pose_rotation(90.0, 0.0, 0.0)
    np.testing.assert_allclose(r @ [0, 1, 0], [1, 0, 0], atol=1e-12)
    np.testing.assert_allclose(r @ [1, 0, 0], [0, -1, 0], atol=1e-12)
    # pitch 30: the boresight rises to (0, cos 30, sin 30); x is unchanged
    r = pose_rotation(0.0, 30.0, 0.0)
    np.testing.assert_allclose(r @ [0, 1, 0], [0, math.cos(math.radians(30)), 0.5], atol=1e-12)
    np.testing.assert_allclose(r @ [1, 0, 0], [1, 0, 0], atol=1e-12)
    # roll 90: the sensor's right side goes down, its x onto -z; its up (z) onto +x
    r = pose_rotation(0.0, 0.0, 90.0)
    np.testing.assert_allclose(r @ [1, 0, 0], [0, 0, -1], atol=1e-12)
    np.testing.assert_allclose(r @ [0, 0, 1], [1, 0, 0], atol=1e-12)
    # yaw 90 then pitch 30: the boresight points along platform +x, 30 deg up
    r = pose_rotation(90.0, 30.0, 0.0)
    np.testing.assert_allclose(r @ [0, 1, 0], [math.cos(math.radians(30)), 0, 0.5], atol=1e-12)


@pytest.mark.parametrize("angles", [(35.0, -10.0, 0.0), (-120.0, 25.0, 7.5), (180.0, -89.0, -45.0)])
def test_rotation_matches_scipy_intrinsic_zxy(angles):
    yaw, pitch, roll = angles
    expected = Rotation.from_euler("ZXY", [-yaw, pitch, roll], degrees=True).as_matrix()
    np.testing.assert_allclose(pose_rotation(yaw, pitch, roll), expected, atol=1e-12)


def test_pose_fields_are_validated_naming_the_field():
    for extra, word in [("\n[pose]\nposition_m = [1.0, 2.0]\n", "position_m"),
                        ("\n[pose]\nyaw_deg = 270.0\n", "yaw_deg"),
                        ("\n[pose]\npitch_deg = 95.0\n", "pitch_deg"),
                        ("\n[pose]\nroll_degrees = 5.0\n", "roll_degrees")]:
        with pytest.raises(CubecastError, match=word):
            parse_sensor(sensor_text(extra=extra), "test")


def test_pose_keeps_a_calibration_valid_and_travels_in_the_sensor_summary():
    plain, moved = parse_sensor(sensor_text(), "test"), posed(1.0, 2.0, 3.0, 40.0, -5.0, 2.0)
    assert plain.array_digest == moved.array_digest   # the array is the same: calibration stays valid
    assert plain.digest != moved.digest               # the description is not
    msg = decode(encode_sensor(moved))
    assert msg.header["summary"]["pose"] == {"position_m": [1.0, 2.0, 3.0], "yaw_deg": 40.0, "pitch_deg": -5.0,
                                             "roll_deg": 2.0}
    assert plain.has_pose is False and moved.has_pose is True


def test_platform_scene_is_seen_through_the_pose_hand_worked():
    # Sensor raised 2.5 m on a mast at platform (1, -0.5), looking along platform +x (yaw 90), tilted
    # 10 deg down (pitch -10). A target on the ground at platform (11, -0.5, 0), moving at 2 m/s along +x:
    #   relative to the sensor: d = (10, 0, -2.5); after the yaw, in the un-tilted sensor axes
    #   (right = -y_platform, forward = +x_platform, up = z): (0, 10, -2.5);
    #   the tilted boresight is (forward, up) = (cos 10, -sin 10) and the tilted up (sin 10, cos 10), so
    #   forward' = 10 cos(10) + 2.5 sin(10) = 10.28220, up' = 10 sin(10) - 2.5 cos(10) = -0.72554 (its
    #   elevation is atan(-2.5/10) + 10 = -4.036 deg), right' = 0 (azimuth 0).
    #   Range sqrt(10^2 + 2.5^2) = 10.30776 m; radial velocity 2 * 10 / 10.30776 = 1.94029 m/s.
    s = posed(1.0, -0.5, 2.5, 90.0, -10.0, 0.0)
    scene = parse_scene('[scene]\nframe = "platform"\n[[target]]\nposition_m = [11.0, -0.5, 0.0]\n'
                        'velocity_mps = [2.0, 0.0, 0.0]\nsnr_db = 20.0\n')
    sim = Simulator(s, scene, noise=False)
    t0 = sim.scene.targets[0]
    np.testing.assert_allclose(t0.position_m, [0.0, 10.28220, -0.72554], atol=2e-5)
    truth = dict(zip(TRUTH_COLUMNS, sim.truth(0)[0]))
    epoch = sim.measurement_epoch_s(0)
    d = np.array([10.0 + 2.0 * epoch, 0.0, -2.5])
    assert truth["range_m"] == pytest.approx(np.linalg.norm(d), abs=1e-9)
    assert truth["azimuth_deg"] == pytest.approx(0.0, abs=1e-9)
    assert truth["elevation_deg"] == pytest.approx(math.degrees(math.atan2(-2.5, d[0])) + 10.0, abs=1e-9)
    assert truth["velocity_mps"] == pytest.approx(2.0 * d[0] / np.linalg.norm(d), abs=1e-9)


def test_a_target_behind_the_array_returns_nothing():
    s = posed()
    sim = Simulator(s, parse_scene("[[target]]\nposition_m = [1.0, -6.0, 0.0]\nsnr_db = 30.0\n"), noise=False)
    assert np.abs(sim.clean_frame(0)).max() == 0.0
    front = Simulator(s, parse_scene("[[target]]\nposition_m = [1.0, 6.0, 0.0]\nsnr_db = 30.0\n"), noise=False)
    assert np.abs(front.clean_frame(0)).max() > 0.0


def test_points_of_a_rotated_raised_sensor_in_the_platform_frame():
    # A sensor on a mast, 1.8 m up at platform (-0.6, 0.4), turned 30 deg left (yaw -30) and 5 deg
    # down (pitch -5), rolled 3 deg: targets placed on the platform. Each point's sensor-frame values
    # must agree with the truth the simulator gives (within 5 of the point's own sigmas), and its
    # platform coordinates must be R (x, y, z) + t with R from scipy's rotation (not ours).
    yaw, pitch, roll, t = -30.0, -5.0, 3.0, np.array([-0.6, 0.4, 1.8])
    s = posed(*t, yaw, pitch, roll, n_tx_az=2, n_rx=4)
    scene = parse_scene('[scene]\nframe = "platform"\n'
                        '[[target]]\nposition_m = [-5.0, 8.0, 1.8]\nsnr_db = 22.0\n'
                        '[[target]]\nposition_m = [-1.0, 12.5, 0.5]\nvelocity_mps = [0.0, 1.5, 0.0]\nsnr_db = 22.0\n')
    sim = Simulator(s, scene, seed=3)
    pipe = Pipeline(s, ProcessingSettings())
    r = Rotation.from_euler("ZXY", [-yaw, pitch, roll], degrees=True).as_matrix()
    truth = sim.truth(0)
    pts = pipe.process(sim.frame(0))
    assert len(pts) >= 2
    cols = {c: i for i, c in enumerate(TRUTH_COLUMNS)}
    matched = 0
    for row in truth:
        k = int(np.argmin(np.abs(pts["range_m"] - row[cols["range_m"]])))
        p = pts[k]
        for name, sigma in (("range_m", "sigma_range_m"), ("azimuth_deg", "sigma_azimuth_deg"),
                            ("velocity_mps", "sigma_velocity_mps")):
            assert abs(p[name] - row[cols[name]]) <= 5 * p[sigma] + 1e-6, (name, p[name], row[cols[name]])
        xyz = np.array([p["x_m"], p["y_m"], p["z_m"]], np.float64)
        platform = r @ xyz + t
        got = np.array([p["platform_x_m"], p["platform_y_m"], p["platform_z_m"]], np.float64)
        np.testing.assert_allclose(got, platform, atol=1e-5)
        matched += 1
    assert matched == 2
    # the truth's platform positions, through the same rotation, are where the scene put them
    back = truth[:, [cols["x_m"], cols["y_m"], cols["z_m"]]] @ r.T + t
    epoch = sim.measurement_epoch_s(0)
    np.testing.assert_allclose(back, [[-5.0, 8.0, 1.8], [-1.0, 12.5 + 1.5 * epoch, 0.5]], atol=1e-9)


def test_without_a_pose_the_platform_frame_is_the_sensor_frame(tmp_path):
    out = tmp_path / "p.npz"
    from tests.helpers import SAMPLES
    assert main(["process", str(SAMPLES / "gate.cap"), "--out", str(out), "--quiet"]) == 0
    z = np.load(out)
    assert len(z["x_m"]) > 0
    for axis in "xyz":
        assert np.array_equal(z[f"platform_{axis}_m"], z[f"{axis}_m"])


def test_describe_prints_the_pose(tmp_path, capsys):
    path = tmp_path / "s.toml"
    path.write_text(sensor_text(extra=POSE.format(x=0.5, y=1.0, z=1.25, yaw=-30.0, pitch=-5.0, roll=0.0)))
    assert main(["describe", str(path)]) == 0
    out = capsys.readouterr().out
    assert "pose on the platform" in out and "at [0.500, 1.000, 1.250] m, yaw -30.00 deg, pitch -5.00 deg" in out
    assert main(["describe", str(path), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["pose"] == {"position_m": [0.5, 1.0, 1.25], "yaw_deg": -30.0, "pitch_deg": -5.0, "roll_deg": 0.0,
                         "given": True}
    assert main(["describe", str(YARD_SENSOR)]) == 0
    assert "none ([pose])" in capsys.readouterr().out
