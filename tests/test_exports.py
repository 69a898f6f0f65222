"""Point files (daemon/exports.py) read back by the format libraries' own readers, never by cubecast's code:
mcap's reader with mcap-ros2-support's decoder, rosbags' bag reader and CDR deserialiser, pypcd4 and
plyfile (the point blob of a PointCloud2 message is unpacked by pypcd4's PointCloud.from_msg). Every
frame is compared, value for value, with what `cubecast process` writes to npz (numpy's own reader);
stamps against exact rational arithmetic (Python's fractions), frame ids against the capture's sensor.

These tests need the optional extra (pip install 'cubecast[export]'); without it they fail, as they
should: CI installs it."""

from __future__ import annotations

import csv
import importlib.util
import re
import subprocess
import sys
import threading
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from mcap.reader import make_reader
from mcap.records import Schema
from mcap_ros2.decoder import DecoderFactory
from plyfile import PlyData
from pypcd4 import Encoding, PointCloud
from rosbags.rosbag2 import Reader as BagReader
from rosbags.typesys import Stores, get_typestore
from ruamel.yaml import YAML

from cubecast.daemon import exports
from cubecast.daemon.capture import CaptureReader, CaptureWriter
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.cli import main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import capture_sensor, simulate_capture, write_points_csv, write_points_npz
from cubecast.daemon.process import process_frames
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sources import ReplaySource
from cubecast.daemon.wire import POINT_WIRE_FIELDS, RECORD_DTYPE
from tests.helpers import SAMPLES
from tests.test_service import REPO, running_service

YARD = SAMPLES / "yard.cap"
# sensor_msgs/msg/PointField.msg: the datatype constants (INT8 = 1 ... FLOAT64 = 8)
POINTFIELD = {1: "i1", 2: "u1", 3: "i2", 4: "u2", 5: "i4", 6: "u4", 7: "f4", 8: "f8"}
# point-cloud tools look for x, y, z (PCL's PointXYZ, common practice); the other fields keep their names
XYZ = {"x_m": "x", "y_m": "y", "z_m": "z"}
WIRE_NAME = {XYZ.get(n, n): n for n, _, _ in POINT_WIRE_FIELDS}
HALF_NS = Fraction(1, 2 * 10 ** 9)
# a scene whose one target crosses the array plane at 20 m/s: seen in frames 0 and 1, then behind the
# sensor, where nothing returns an echo (frames without points)
CROSSING = """
[scene]
name = "crossing"

[[target]]
name = "crossing"
position_m = [0.5, 4.0, 0.0]
velocity_mps = [0.0, -20.0, 0.0]
rcs_dbsm = 10.0
"""


class Expected:
    """Every frame of a capture (from the capture itself) and its points as `cubecast process` wrote them
    to npz, read with numpy."""

    def __init__(self, capture: Path, npz: Path):
        with CaptureReader(capture) as r:
            self.sensor_id = capture_sensor(r).sensor_id
            self.frames = [(f.sequence, f.timestamp_s) for f in r]
        data = np.load(npz)
        assert list(data.files) == list(RECORD_DTYPE.names)
        self.points = {seq: {name: data[name][data["frame"] == seq] for name in data.files}
                       for seq, _ in self.frames}
        assert sum(len(p["frame"]) for p in self.points.values()) == len(data["frame"])


def process(capture: Path, out: Path, *fmt: str) -> Path:
    argv = ["-q", "process", str(capture), "--out", str(out)] + (["--format", fmt[0]] if fmt else [])
    assert main(argv) == 0
    return out


@pytest.fixture(scope="module")
def captures(tmp_path_factory):
    """{name: (capture, Expected)}: the bundled yard and a simulated capture with frames without points."""
    tmp = tmp_path_factory.mktemp("captures")
    crossing = tmp / "crossing.cap"
    with CaptureReader(YARD) as r:
        sensor = capture_sensor(r)
    simulate_capture(sensor, parse_scene(CROSSING, "crossing scene"), crossing, frames=5, seed=3)
    out = {}
    for name, cap in (("yard", YARD), ("crossing", crossing)):
        out[name] = cap, Expected(cap, process(cap, tmp / f"{name}.npz"))
    counts = [len(p["frame"]) for p in out["crossing"][1].points.values()]
    assert min(counts) == 0 and max(counts) > 0, counts  # the case under test: empty and full frames
    assert min(len(p["frame"]) for p in out["yard"][1].points.values()) > 0
    return out


def cloud_dtype(name: str, kind: str) -> np.dtype:
    """The type a record field must have in a format: its wire type, except a 64-bit integer in PLY and
    PointCloud2 (neither has one its common readers know), which is float64."""
    wire = np.dtype(dict((n, d) for n, _, d in POINT_WIRE_FIELDS)[name])
    if kind != "pcd" and wire.kind == "u" and wire.itemsize == 8:
        return np.dtype("<f8")
    return wire


def assert_same_points(got: np.ndarray, want: dict, kind: str, where: str) -> None:
    """Every record field present by its name and type, every value equal to the npz's (NaN where NaN)."""
    names = [n for n in got.dtype.names if not n.startswith("__")]  # pypcd4 names PointCloud2 padding __N
    assert names[:3] == ["x", "y", "z"], (where, names)
    assert sorted(names) == sorted(XYZ.get(n, n) for n, _, _ in POINT_WIRE_FIELDS), (where, names)
    for wire, _, _ in POINT_WIRE_FIELDS:
        col, dt = got[XYZ.get(wire, wire)], cloud_dtype(wire, kind)
        assert col.dtype == dt, (where, wire, col.dtype, dt)
        assert col.shape == want[wire].shape, (where, wire, col.shape, want[wire].shape)
        assert np.array_equal(col, want[wire].astype(dt), equal_nan=dt.kind == "f"), (where, wire)
        if dt != want[wire].dtype:  # float64 holding an integer: exactly the integer
            assert np.array_equal(col.astype(want[wire].dtype), want[wire]), (where, wire)


def assert_stamp(sec: int, nanosec: int, timestamp_s: float, where: str) -> None:
    """builtin_interfaces/Time: whole seconds and 0 <= nanosec < 10^9, the frame's time to the nearest ns."""
    assert 0 <= nanosec < 10 ** 9, (where, nanosec)
    assert abs(Fraction(sec) + Fraction(nanosec, 10 ** 9) - Fraction(timestamp_s)) <= HALF_NS, (where, sec, nanosec)


def assert_pointcloud2(msg, want: dict, seq: int, timestamp_s: float, sensor_id: str, where: str) -> None:
    assert_stamp(msg.header.stamp.sec, msg.header.stamp.nanosec, timestamp_s, where)
    assert msg.header.frame_id == sensor_id, where
    n = len(want["frame"])
    assert (msg.height, msg.width, msg.is_bigendian) == (1, n, False), where
    assert msg.row_step == msg.point_step * n and len(msg.data) == msg.row_step, where
    for f in msg.fields:
        assert f.count == 1 and POINTFIELD[f.datatype] == cloud_dtype(WIRE_NAME[f.name], "ros").str[1:], (where, f)
    assert_same_points(PointCloud.from_msg(msg).pc_data, want, "ros", where)


# ---- the formats, read back ---------------------------------------------------------------------

@pytest.mark.parametrize("name", ["yard", "crossing"])
def test_mcap_read_by_the_mcap_reader_and_its_ros2_decoder(captures, name, tmp_path):
    cap, want = captures[name]
    out = process(cap, tmp_path / "points.mcap")  # chosen by the extension
    with open(out, "rb") as f:
        reader = make_reader(f, decoder_factories=[DecoderFactory()])
        assert reader.get_header().profile == "ros2"
        decoded = list(reader.iter_decoded_messages())
    assert len(decoded) == len(want.frames)  # one message per frame, those without points too
    typestore = get_typestore(Stores.ROS2_JAZZY)
    for (schema, channel, message, msg), (seq, ts) in zip(decoded, want.frames):
        where = f"{name} frame {seq}"
        assert (schema.name, schema.encoding, channel.message_encoding) == ("sensor_msgs/msg/PointCloud2", "ros2msg",
                                                                           "cdr")
        assert channel.topic == "/cubecast/points"
        # MCAP times are nanoseconds since the epoch: the stamp's, to the nanosecond
        ns = msg.header.stamp.sec * 10 ** 9 + msg.header.stamp.nanosec
        assert message.log_time == message.publish_time == ns, where
        assert_pointcloud2(msg, want.points[seq], seq, ts, want.sensor_id, where)
        # rosbags' deserialiser reads the same bytes alike
        again = typestore.deserialize_cdr(message.data, "sensor_msgs/msg/PointCloud2")
        assert_pointcloud2(again, want.points[seq], seq, ts, want.sensor_id, where)


@pytest.mark.parametrize("name", ["yard", "crossing"])
def test_rosbag_read_by_rosbags(captures, name, tmp_path):
    cap, want = captures[name]
    out = process(cap, tmp_path / "bag", "rosbag")
    info = YAML(typ="safe").load((out / "metadata.yaml").read_text())["rosbag2_bagfile_information"]
    assert info["storage_identifier"] == "sqlite3" and info["message_count"] == len(want.frames)
    assert [p for p in info["relative_file_paths"]] == ["bag.db3"] and (out / "bag.db3").is_file()
    typestore = get_typestore(Stores.ROS2_JAZZY)
    with BagReader(out) as bag:
        assert [(c.topic, c.msgtype) for c in bag.connections] == [("/cubecast/points", "sensor_msgs/msg/PointCloud2")]
        conn = bag.connections[0]
        # the message definition stored in the bag, as mcap-ros2-support's decoder reads it (a second reader)
        other = DecoderFactory().decoder_for("cdr", Schema(id=1, name=conn.msgtype, encoding="ros2msg",
                                                            data=conn.msgdef.data.encode()))
        messages = list(bag.messages())
    assert len(messages) == len(want.frames)
    for (c, t, raw), (seq, ts) in zip(messages, want.frames):
        where = f"{name} frame {seq}"
        msg = typestore.deserialize_cdr(raw, c.msgtype)
        assert t == msg.header.stamp.sec * 10 ** 9 + msg.header.stamp.nanosec, where  # bag time = stamp
        assert_pointcloud2(msg, want.points[seq], seq, ts, want.sensor_id, where)
        assert_pointcloud2(other(raw), want.points[seq], seq, ts, want.sensor_id, where)


def read_index(folder: Path) -> list[dict]:
    with open(folder / "index.csv", newline="") as f:
        return list(csv.DictReader(f))


def assert_index(rows: list[dict], want: Expected, ext: str, folder: Path) -> None:
    assert [r["frame"] for r in rows] == [str(seq) for seq, _ in want.frames]
    assert [float(r["timestamp_s"]) for r in rows] == [ts for _, ts in want.frames]  # written exactly
    assert [int(r["points"]) for r in rows] == [len(want.points[seq]["frame"]) for seq, _ in want.frames]
    assert {r["frame_id"] for r in rows} == {want.sensor_id}
    assert sorted(p.name for p in folder.iterdir()) == sorted([r["file"] for r in rows] + ["index.csv"])
    assert all(r["file"].endswith(ext) for r in rows)


@pytest.mark.parametrize("name", ["yard", "crossing"])
def test_pcd_folder_read_by_pypcd4(captures, name, tmp_path):
    cap, want = captures[name]
    out = process(cap, tmp_path / "clouds", "pcd")
    rows = read_index(out)
    assert_index(rows, want, ".pcd", out)
    for row, (seq, ts) in zip(rows, want.frames):
        raw = (out / row["file"]).read_bytes()
        assert b"\nDATA binary\n" in raw  # PCD 0.7 binary, not ascii or binary_compressed
        pc = PointCloud.from_path(out / row["file"])
        assert pc.metadata.data == Encoding.BINARY and pc.points == len(want.points[seq]["frame"])
        assert_same_points(pc.pc_data, want.points[seq], "pcd", f"{name} {row['file']}")


@pytest.mark.parametrize("name", ["yard", "crossing"])
def test_ply_folder_read_by_plyfile(captures, name, tmp_path):
    cap, want = captures[name]
    out = process(cap, tmp_path / "clouds", "ply")
    rows = read_index(out)
    assert_index(rows, want, ".ply", out)
    for row, (seq, ts) in zip(rows, want.frames):
        assert (out / row["file"]).read_bytes().startswith(b"ply\nformat binary_little_endian 1.0\n")
        ply = PlyData.read(out / row["file"])
        assert (ply.text, ply.byte_order) == (False, "<")
        assert ply.comments == [f"frame {seq}", f"timestamp_s {ts!r}", f"frame_id {want.sensor_id}"]
        assert [e.name for e in ply.elements] == ["vertex"]
        assert_same_points(ply["vertex"].data, want.points[seq], "ply", f"{name} {row['file']}")


def test_csv_and_npz_are_as_before(captures, tmp_path):
    """The CSV and npz of the writers hold what files.write_points_csv / write_points_npz wrote before
    them (the CSV byte for byte)."""
    with CaptureReader(YARD) as r:
        records = process_frames(r, Pipeline(capture_sensor(r)))
    write_points_csv(tmp_path / "before.csv", records)
    write_points_npz(tmp_path / "before.npz", records)
    assert process(YARD, tmp_path / "now.csv").read_bytes() == (tmp_path / "before.csv").read_bytes()
    a, b = np.load(process(YARD, tmp_path / "now.npz")), np.load(tmp_path / "before.npz")
    assert a.files == b.files and all(a[k].dtype == b[k].dtype and np.array_equal(a[k], b[k], equal_nan=True)
                                      for k in a.files)


# ---- record, live ---------------------------------------------------------------------------------

SUMMARY = re.compile(r"cubecast record: (\d+) point clouds, (\d+) points -> (.+)$", re.M)


def test_record_writes_a_rosbag_during_a_live_replay(captures, tmp_path):
    """The bundled capture replayed in a loop at its recorded speed over 127.0.0.1, processed by serve,
    recorded by `cubecast record --points-out BAG --points-format rosbag --frames 12`: the bag holds
    every cloud record counted, each equal to the offline points of the same capture frame."""
    _, want = captures["yard"]
    with CaptureReader(YARD) as r:
        sensor = capture_sensor(r)
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=1.0, loop=True, wait_s=30)
    ep = src.bind()
    bag = tmp_path / "live"
    stop = threading.Event()
    with running_service(sensor, ep) as svc:
        t = threading.Thread(target=src.run, args=(stop,), daemon=True)
        t.start()
        try:
            done = subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", "record", "--sub", svc.pub_endpoint,
                                   "--points-out", str(bag), "--points-format", "rosbag", "--frames", "12"],
                                  cwd=REPO, capture_output=True, text=True, timeout=120)
        finally:
            stop.set()
            t.join(10)
    assert not t.is_alive()
    assert done.returncode == 0, done.stderr
    m = SUMMARY.search(done.stderr)
    assert m and m.group(3) == str(bag), done.stderr
    clouds, points = int(m.group(1)), int(m.group(2))
    assert clouds == 12
    typestore = get_typestore(Stores.ROS2_JAZZY)
    with BagReader(bag) as reader:
        msgs = [typestore.deserialize_cdr(raw, c.msgtype) for c, _, raw in reader.messages()]
    assert len(msgs) == clouds and sum(m.width for m in msgs) == points
    n = len(want.frames)
    for msg in msgs:
        pc = PointCloud.from_msg(msg).pc_data
        seq = int(pc["frame"][0])  # every yard frame has points
        lap, j = divmod(seq, n)
        frame, ts = want.frames[j]
        assert msg.header.frame_id == sensor.sensor_id
        # a loop shifts the timestamps by the capture's span plus one frame period per pass (2.0 s)
        stamp = Fraction(msg.header.stamp.sec) + Fraction(msg.header.stamp.nanosec, 10 ** 9)
        assert abs(float(stamp) - (ts + 2.0 * lap)) < 1e-6
        expected = dict(want.points[frame])
        expected["frame"] = np.full(len(pc), seq, np.uint64)
        expected["timestamp_s"] = pc["timestamp_s"]  # the source's time of this pass
        assert all(abs(Fraction(float(v)) - stamp) <= HALF_NS for v in pc["timestamp_s"])
        assert_same_points(pc, expected, "ros", f"recorded frame {seq}")


# ---- bad names, missing folders, the extra, half-written files -------------------------------------

def one_line(capsys, argv: list) -> str:
    assert main([str(a) for a in argv]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    return err


def test_unknown_extensions_and_formats_are_named(tmp_path, capsys):
    err = one_line(capsys, ["process", YARD, "--out", tmp_path / "p.las"])
    assert "extension '.las'" in err and "--format" in err and "rosbag" in err
    err = one_line(capsys, ["process", YARD, "--out", tmp_path / "p.mcap", "--format", "las"])
    assert "unknown format 'las'" in err and "csv, npz, pcd, ply, mcap, rosbag" in err
    err = one_line(capsys, ["process", YARD, "--out", tmp_path / "p.pcd"])
    assert "folder" in err and "--format pcd" in err
    err = one_line(capsys, ["record", "--sub", "tcp://127.0.0.1:5999", "--points-out", tmp_path / "p.bag"])
    assert err.startswith("cubecast record: error: --points-out") and "extension '.bag'" in err
    err = one_line(capsys, ["record", "--sub", "tcp://127.0.0.1:5999", "--points-out", tmp_path / "p.csv",
                            "--points-format", "xyz"])
    assert "unknown format 'xyz'" in err
    (tmp_path / "taken").mkdir()
    err = one_line(capsys, ["process", YARD, "--out", tmp_path / "taken", "--format", "rosbag"])
    assert "exists already" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["taken"]
    with pytest.raises(CubecastError, match="extension '.txt'"):
        exports.check_target("--points-out", tmp_path / "p.txt", None)


@pytest.mark.parametrize("fmt", exports.FORMATS)
def test_a_path_in_a_missing_folder_is_one_line(fmt, tmp_path, capsys):
    missing = tmp_path / "no" / "such"
    target = missing / "points"
    err = one_line(capsys, ["process", YARD, "--out", target, "--format", fmt])
    assert f"--out {target}: cannot write: folder {missing} does not exist" in err
    err = one_line(capsys, ["record", "--sub", "tcp://127.0.0.1:5999", "--points-out", target, "--points-format", fmt])
    assert f"--points-out {target}: cannot write: folder {missing} does not exist" in err
    assert not (tmp_path / "no").exists()


@pytest.mark.parametrize("fmt,module", [("pcd", "pypcd4"), ("ply", "plyfile"), ("mcap", "mcap"), ("rosbag", "rosbags")])
def test_without_the_extra_a_format_is_a_one_line_error_naming_the_install(fmt, module, tmp_path, capsys, monkeypatch):
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == module else real(name, *a))
    err = one_line(capsys, ["process", YARD, "--out", tmp_path / "p", "--format", fmt])
    assert f"the {fmt} format needs {module}" in err and "pip install 'cubecast[export]'" in err
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("fmt", exports.FORMATS)
def test_nothing_is_under_the_final_name_until_close(fmt, tmp_path):
    target = tmp_path / ("points." + fmt if fmt in ("csv", "npz", "mcap") else "points")
    records = np.zeros(2, RECORD_DTYPE)
    w = exports.open_writer("--out", target, fmt)
    w.write_frame(0, 0.0, records, "s")
    [tmp] = list(tmp_path.iterdir())
    assert tmp.name.startswith(".points") and tmp.name.endswith(".part") and not target.exists()
    w.close()
    assert [p.name for p in tmp_path.iterdir()] == [target.name]
    # a failure half-way (a corrupt last frame) leaves neither the output nor its temporary name
    bad = tmp_path / "bad.cap"
    with CaptureReader(YARD) as r:
        frames = [r[j] for j in range(3)]
        with CaptureWriter(bad, r.sensor_toml, None, r.metadata) as cw:
            for f in frames:
                cw.write(f.payload, f.sequence, f.timestamp_s)
    data = bytearray(bad.read_bytes())
    data[len(data) - (len(data) // 3) // 2] ^= 0xFF  # inside the last frame's payload
    bad.write_bytes(bytes(data))
    target.rename(tmp_path / "kept")
    assert main(["-q", "process", str(bad), "--out", str(target), "--format", fmt]) == 2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.cap", "kept"]


@pytest.mark.parametrize("fmt", ["ply", "mcap"])
def test_a_u64_field_as_float64_is_exact_below_2_53_and_refused_above(fmt, tmp_path):
    # IEEE 754 binary64 has a 53-bit significand: every integer up to 2^53 is exact, 2^53 + 1 is not
    target = tmp_path / ("p.mcap" if fmt == "mcap" else "p")
    records = np.zeros(1, RECORD_DTYPE)
    records["frame"] = 2 ** 53 - 1
    with exports.open_writer("--out", target, fmt) as w:
        w.write_frame(2 ** 53 - 1, 1.5, records, "s")
    if fmt == "ply":
        got = PlyData.read(target / "000000.ply")["vertex"].data["frame"]
    else:
        with open(target, "rb") as f:
            [(_, _, _, msg)] = make_reader(f, decoder_factories=[DecoderFactory()]).iter_decoded_messages()
        got = PointCloud.from_msg(msg).pc_data["frame"]
    assert got.dtype == np.float64 and int(got[0]) == 2 ** 53 - 1
    records["frame"] = 2 ** 53 + 1
    w = exports.open_writer("--out", tmp_path / ("q.mcap" if fmt == "mcap" else "q"), fmt)
    with pytest.raises(CubecastError, match=r"field frame = 9007199254740993: .*2\^53"):
        w.write_frame(2 ** 53 + 1, 1.5, records, "s")
    w.abort()
    assert sorted(p.name for p in tmp_path.iterdir()) == [target.name]
