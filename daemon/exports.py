"""Point-cloud output files: one streaming writer per format, shared by `cubecast process --out` and
`cubecast record --points-out` (README "Point files").

Formats: csv and npz (every record in one file, as they always were), pcd and ply (a folder, one
binary file per frame plus index.csv naming each file's frame, timestamp and point count), mcap (one
file, ROS 2 sensor_msgs/msg/PointCloud2 messages in CDR with their ros2msg schema) and rosbag (a ROS 2
bag folder, rosbag2 version 8 with sqlite3 storage, the same messages). pcd, ply, mcap and rosbag
need the optional extra: pip install 'cubecast[export]'.

Every writer has open() / write_frame(frame, timestamp_s, records, sensor_id) / close() (and abort(),
which removes what it wrote): it writes under a temporary name beside the target and renames it into
place on close, so the final name never holds a half-written file. A frame without points is written
too where the format can hold it (an empty cloud, an empty file, a row of index.csv), so a reader sees
every frame; CSV and npz list points only.

Fields come from wire.POINT_WIRE_FIELDS with their names and types; in the point-cloud formats (pcd,
ply, PointCloud2) x_m, y_m, z_m are named x, y, z as point-cloud tools expect. PLY and PointCloud2
have no 64-bit integer type that their common readers know (PointField's datatypes 1..8 in ROS 2
up to Jazzy; PLY's eight types), so a u64 field is written there as float64: exact for values below
2^53 (IEEE 754 doubles hold every integer up to 2^53), and a larger value is refused, never rounded.
"""

from __future__ import annotations

import logging
import math
import os
import secrets
import shutil
import sqlite3
import tempfile
import zipfile
from fractions import Fraction
from pathlib import Path

import numpy as np

from .cliout import check_output_path
from .errors import CubecastError
from .wire import POINT_WIRE_FIELDS, RECORD_DTYPE

log = logging.getLogger(__name__)

FORMATS = ("csv", "npz", "pcd", "ply", "mcap", "rosbag")
EXTENSIONS = {".csv": "csv", ".npz": "npz", ".mcap": "mcap"}
FOLDER_FORMATS = ("pcd", "ply", "rosbag")
EXTRA_HINT = "pip install 'cubecast[export]'"
# the Python modules each format needs beyond cubecast's own dependencies
EXTRA_MODULES = {"pcd": ("pypcd4",), "ply": ("plyfile",), "mcap": ("mcap", "rosbags"), "rosbag": ("rosbags",)}

POINTS_TOPIC = "/cubecast/points"  # ROS topic of the clouds in mcap and rosbag output
POINTCLOUD2 = "sensor_msgs/msg/PointCloud2"
ROSBAG_VERSION = 8  # rosbag2 metadata version (that of ROS 2 Jazzy, from memory)
# sensor_msgs/msg/PointField datatypes (the message's constants)
POINTFIELD_DATATYPES = {"i1": 1, "u1": 2, "i2": 3, "u2": 4, "i4": 5, "u4": 6, "f4": 7, "f8": 8}
FLOAT64_EXACT_MAX = 2 ** 53
XYZ_NAMES = {"x_m": "x", "y_m": "y", "z_m": "z"}


# ---- choosing and checking a format ------------------------------------------------------------

def resolve_format(flag: str, path: str | Path, fmt: str | None) -> str:
    """The format `fmt` (checked) or the one the file name says; CubecastError naming FLAG PATH."""
    if fmt is not None:
        if fmt not in FORMATS:
            raise CubecastError(f"{flag} {path}: unknown format {fmt!r}; choose one of {', '.join(FORMATS)}")
        return fmt
    suffix = Path(str(path)).suffix.lower()
    if suffix in EXTENSIONS:
        return EXTENSIONS[suffix]
    if suffix in (".pcd", ".ply"):
        raise CubecastError(f"{flag} {path}: {suffix[1:]} output is a folder with one {suffix} file per frame; "
                            f"name the folder and give --format {suffix[1:]}")
    said = f"extension {suffix!r}" if suffix else "no extension"
    raise CubecastError(f"{flag} {path}: {said}; name a {', '.join(EXTENSIONS)} file, or give --format "
                        f"({', '.join(FORMATS)}; pcd, ply and rosbag write a folder)")


def require_extra(flag: str, path: str | Path, fmt: str) -> None:
    """CubecastError (one line, naming the install command) when `fmt` needs a module not installed."""
    import importlib.util
    missing = [m for m in EXTRA_MODULES.get(fmt, ()) if importlib.util.find_spec(m) is None]
    if missing:
        raise CubecastError(f"{flag} {path}: the {fmt} format needs {', '.join(missing)}: {EXTRA_HINT}")


def check_target(flag: str, path: str | Path, fmt: str | None) -> str:
    """Before any work: the format (resolve_format), its libraries, and that the target can be written
    (a file in a writable folder; a folder format's folder must not exist yet). Returns the format."""
    p = Path(str(path))
    if p.is_dir() and fmt not in FOLDER_FORMATS:
        check_output_path(flag, str(path))  # "it is a folder; give a file name"
    fmt = resolve_format(flag, path, fmt)
    require_extra(flag, path, fmt)
    if fmt in FOLDER_FORMATS and (p.exists() or p.is_symlink()):
        raise CubecastError(f"{flag} {path}: cannot write: it exists already; {fmt} output is a new folder "
                            "(remove it or name another)")
    check_output_path(flag, str(path))
    return fmt


def open_writer(flag: str, path: str | Path, fmt: str | None) -> "PointWriter":
    """The checked, opened writer for `path` in `fmt` (or the format its name says)."""
    fmt = check_target(flag, path, fmt)
    return WRITERS[fmt](path, flag).open()


# ---- field layouts ------------------------------------------------------------------------------

def cloud_fields(wide_integers: bool) -> list[tuple[str, str, np.dtype]]:
    """(wire name, output name, output dtype) of every record field for the point-cloud formats: x, y, z
    first (as point-cloud tools look for them), then the rest in wire order. Without `wide_integers` a
    64-bit integer field becomes float64 (to_cloud checks that it stays exact)."""
    fields = []
    for name, _, dtype in POINT_WIRE_FIELDS:
        dt = np.dtype(dtype)
        if not wide_integers and dt.kind in "iu" and dt.itemsize == 8:
            dt = np.dtype("<f8")
        fields.append((name, XYZ_NAMES.get(name, name), dt))
    return sorted(fields, key=lambda f: f[1] not in ("x", "y", "z"))  # stable: x, y, z keep their order


def aligned_dtype(fields: list[tuple[str, str, np.dtype]]) -> np.dtype:
    """A record dtype of the output names with every field at an offset that is a multiple of its size
    and the record padded to the largest size (C struct layout, common practice)."""
    names, formats, offsets, at = [], [], [], 0
    for _, out, dt in fields:
        at = -(-at // dt.itemsize) * dt.itemsize
        names.append(out), formats.append(dt), offsets.append(at)
        at += dt.itemsize
    step = max(dt.itemsize for _, _, dt in fields)
    return np.dtype({"names": names, "formats": formats, "offsets": offsets, "itemsize": -(-at // step) * step})


def to_cloud(records: np.ndarray, fields: list[tuple[str, str, np.dtype]], dtype: np.dtype) -> np.ndarray:
    """The records in `dtype` (output names); an integer written as float64 must be below 2^53."""
    out = np.zeros(len(records), dtype)
    for wire, name, dt in fields:
        col = records[wire]
        if dt.kind == "f" and col.dtype.kind in "iu" and len(col) and int(col.max()) >= FLOAT64_EXACT_MAX:
            raise CubecastError(f"field {wire} = {int(col.max())}: this format holds it as float64, exact only "
                                f"below 2^53; it would be rounded")
        out[name] = col
    return out


def stamp_ns(timestamp_s: float) -> int:
    """A frame timestamp in whole nanoseconds, rounded to the nearest (exactly, from the double's value)."""
    if not math.isfinite(timestamp_s):
        raise CubecastError(f"timestamp_s {timestamp_s!r}: must be finite")
    return round(Fraction(timestamp_s) * 10 ** 9)


# ---- the writers --------------------------------------------------------------------------------

class PointWriter:
    """Base of every format's writer: the temporary target and its rename, counts, errors naming the
    flag and path. Subclasses set `fmt` and `folder` and implement _begin, _frame and _finish."""

    fmt = ""
    folder = False
    io_errors: tuple[type[Exception], ...] = (OSError,)  # a failed write (disk full, folder removed), named

    def __init__(self, path: str | Path, flag: str = "--out"):
        self.path, self.flag = Path(str(path)), flag
        self.tmp: Path | None = None
        self.frames = 0
        self.points = 0

    def _fail(self, exc: Exception) -> CubecastError:
        return CubecastError(f"{self.flag} {self.path}: cannot write: {getattr(exc, 'strerror', None) or exc}")

    def _temporary(self) -> Path:
        """A fresh name beside the target (hidden, ending .part), created as a file or a folder with the
        default permissions (the umask applies)."""
        parent = self.path.parent
        for _ in range(100):
            tmp = parent / f".{self.path.name}.{secrets.token_hex(4)}.part"
            try:
                if self.folder:
                    tmp.mkdir(0o777)
                else:
                    os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
                return tmp
            except FileExistsError:
                continue
        raise CubecastError(f"{self.flag} {self.path}: cannot make a temporary name beside it")

    def open(self) -> "PointWriter":
        if self.tmp is not None:
            return self
        try:
            self.tmp = self._temporary()
            self._begin()
        except self.io_errors as exc:
            self.abort()
            raise self._fail(exc) from None
        except BaseException:
            self.abort()
            raise
        return self

    def write_frame(self, frame: int, timestamp_s: float, records: np.ndarray, sensor_id: str) -> None:
        """One frame's point cloud (RECORD_DTYPE records, possibly none) from sensor `sensor_id`."""
        if self.tmp is None:
            raise RuntimeError("write_frame before open")
        try:
            self._frame(int(frame), float(timestamp_s), records, str(sensor_id))
        except self.io_errors as exc:
            raise self._fail(exc) from None
        self.frames += 1
        self.points += len(records)

    def close(self) -> None:
        """Finish the file and rename it to its final name."""
        if self.tmp is None:
            return
        try:
            final = self._finish()
            if self.folder and (self.path.exists() or self.path.is_symlink()):
                self.tmp = None  # kept: the caller is told where
                raise CubecastError(f"{self.flag} {self.path}: cannot write: it appeared while writing; the "
                                    f"output is left in {final}")
            os.replace(final, self.path)
            if final != self.tmp:
                self.tmp.rmdir()
        except self.io_errors as exc:
            self.abort()
            raise self._fail(exc) from None
        except CubecastError:
            raise
        except BaseException:
            self.abort()
            raise
        self.tmp = None

    def abort(self) -> None:
        """Stop and remove what was written (the final name is left as it was)."""
        try:
            self._abandon()
        except Exception:  # the temporary name goes anyway
            log.debug("abandoning %s", self.tmp, exc_info=True)
        tmp, self.tmp = self.tmp, None
        if tmp is not None:
            if tmp.is_dir():
                shutil.rmtree(tmp, ignore_errors=True)
            else:
                tmp.unlink(missing_ok=True)

    def __enter__(self) -> "PointWriter":
        return self.open()

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is None:
            self.close()
        else:
            self.abort()
        return False

    # subclasses
    def _begin(self) -> None:
        raise NotImplementedError

    def _frame(self, frame: int, timestamp_s: float, records: np.ndarray, sensor_id: str) -> None:
        raise NotImplementedError

    def _finish(self) -> Path:
        """Finish writing under self.tmp; return the path to rename to the final name."""
        raise NotImplementedError

    def _abandon(self) -> None:
        """Close open handles without finishing."""


def _fmt(v: float) -> str:
    return "nan" if math.isnan(v) else f"{v:.6g}"


def csv_lines(records: np.ndarray) -> str:
    """The CSV rows of `records` (files.write_points_csv's format: frame, timestamp_s to the microsecond,
    every other field to 6 significant digits or nan)."""
    names = RECORD_DTYPE.names
    return "".join(f"{int(row['frame'])},{float(row['timestamp_s']):.6f}," + ",".join(
        _fmt(float(row[k])) for k in names[2:]) + "\n" for row in records)


class CsvWriter(PointWriter):
    """Every point one row under a header of the record field names (frames without points: no row)."""

    fmt = "csv"

    def _begin(self) -> None:
        self._f = open(self.tmp, "w", encoding="utf-8", newline="\n")
        self._f.write(",".join(RECORD_DTYPE.names) + "\n")

    def _frame(self, frame, timestamp_s, records, sensor_id) -> None:
        self._f.write(csv_lines(records))

    def _finish(self) -> Path:
        self._f.close()
        return self.tmp

    def _abandon(self) -> None:
        f = getattr(self, "_f", None)
        if f is not None:
            f.close()


class NpzWriter(PointWriter):
    """One array per record field over all points, in an npz as numpy.savez writes it (zip, stored). The
    columns are spooled to unnamed temporary files while frames arrive, so a long recording is not held
    in memory; each column is read back once at close."""

    fmt = "npz"

    def _begin(self) -> None:
        self._spools = {name: tempfile.TemporaryFile(dir=self.path.parent) for name in RECORD_DTYPE.names}

    def _frame(self, frame, timestamp_s, records, sensor_id) -> None:
        for name, f in self._spools.items():
            f.write(np.ascontiguousarray(records[name]).tobytes())

    def _finish(self) -> Path:
        with zipfile.ZipFile(self.tmp, mode="w", compression=zipfile.ZIP_STORED, allowZip64=True) as z:
            for name, f in self._spools.items():
                f.seek(0)
                column = np.frombuffer(f.read(), RECORD_DTYPE[name])
                with z.open(f"{name}.npy", "w", force_zip64=True) as member:
                    np.lib.format.write_array(member, column, allow_pickle=False)
        self._abandon()
        return self.tmp

    def _abandon(self) -> None:
        for f in getattr(self, "_spools", {}).values():
            f.close()
        self._spools = {}


class _FolderWriter(PointWriter):
    """One file per frame in a folder, named by the frame's place in the output (000000.EXT, 000001.EXT,
    ...: a source that restarts repeats frame numbers), with index.csv: file, frame, timestamp_s (the
    double written exactly), points, frame_id."""

    folder = True
    ext = ""
    INDEX = "index.csv"

    def _begin(self) -> None:
        self._index = open(self.tmp / self.INDEX, "w", encoding="utf-8", newline="\n")
        self._index.write("file,frame,timestamp_s,points,frame_id\n")
        self._fields = cloud_fields(self.wide_integers)
        self._dtype = np.dtype([(out, dt) for _, out, dt in self._fields])  # packed: the formats have no padding

    def _frame(self, frame, timestamp_s, records, sensor_id) -> None:
        name = f"{self.frames:06d}.{self.ext}"
        cloud = to_cloud(records, self._fields, self._dtype)
        self._write_cloud(self.tmp / name, cloud, frame, timestamp_s, sensor_id)
        self._index.write(f"{name},{frame},{timestamp_s!r},{len(records)},{sensor_id}\n")

    def _finish(self) -> Path:
        self._index.close()
        return self.tmp

    def _abandon(self) -> None:
        f = getattr(self, "_index", None)
        if f is not None:
            f.close()


class PcdWriter(_FolderWriter):
    """PCD 0.7, DATA binary (pypcd4), one cloud per frame; u64 fields stay U 8 (the PCD format's SIZE 8)."""

    fmt, ext, wide_integers = "pcd", "pcd", True

    def _write_cloud(self, path, cloud, frame, timestamp_s, sensor_id) -> None:
        from pypcd4 import Encoding, PointCloud
        pc = PointCloud.from_points([cloud[n] for n in cloud.dtype.names], cloud.dtype.names,
                                    [cloud.dtype[n] for n in cloud.dtype.names])
        with open(path, "wb") as f:
            pc.save(f, encoding=Encoding.BINARY)


class PlyWriter(_FolderWriter):
    """PLY binary_little_endian 1.0 (plyfile), one `vertex` element per frame; comments carry the frame,
    its timestamp and the sensor id."""

    fmt, ext, wide_integers = "ply", "ply", False

    def _write_cloud(self, path, cloud, frame, timestamp_s, sensor_id) -> None:
        from plyfile import PlyData, PlyElement
        vertex = PlyElement.describe(cloud.astype(cloud.dtype.newbyteorder("<")), "vertex")
        comments = [f"frame {frame}", f"timestamp_s {timestamp_s!r}", f"frame_id {sensor_id}"]
        with open(path, "wb") as f:
            PlyData([vertex], text=False, byte_order="<", comments=comments).write(f)


class _Ros2Clouds:
    """sensor_msgs/msg/PointCloud2 messages in CDR, built and serialised with rosbags' typestore (no ROS
    installation): one row of `width` points, fields per PointField, little endian, stamp = frame time,
    frame_id = sensor id."""

    def __init__(self):
        from rosbags.typesys import Stores, get_typestore
        self.typestore = get_typestore(Stores.ROS2_JAZZY)
        t = self.typestore.types
        self._cloud, self._field = t[POINTCLOUD2], t["sensor_msgs/msg/PointField"]
        self._header, self._time = t["std_msgs/msg/Header"], t["builtin_interfaces/msg/Time"]
        self.fields = cloud_fields(wide_integers=False)
        self.dtype = aligned_dtype(self.fields)
        self.point_fields = [self._field(name=name, offset=self.dtype.fields[name][1],
                                         datatype=POINTFIELD_DATATYPES[self.dtype[name].str[1:]], count=1)
                             for name in self.dtype.names]

    def msgdef(self) -> str:
        return self.typestore.generate_msgdef(POINTCLOUD2, ros_version=2)[0]

    def serialize(self, timestamp_s: float, records: np.ndarray, sensor_id: str) -> tuple[int, bytes]:
        """(stamp in nanoseconds since the epoch, CDR bytes) of one cloud."""
        ns = stamp_ns(timestamp_s)
        sec, nanosec = divmod(ns, 10 ** 9)
        if not (0 <= sec < 2 ** 31):
            raise CubecastError(f"timestamp_s {timestamp_s!r}: a ROS 2 stamp and an MCAP or bag log time take "
                                "0 .. 2^31 s since the epoch")
        cloud = to_cloud(records, self.fields, self.dtype)
        xyz_finite = bool(np.all(np.isfinite(cloud["x"]) & np.isfinite(cloud["y"]) & np.isfinite(cloud["z"])))
        msg = self._cloud(
            header=self._header(stamp=self._time(sec=sec, nanosec=nanosec), frame_id=sensor_id),
            height=1, width=len(cloud), fields=self.point_fields, is_bigendian=False,
            point_step=self.dtype.itemsize, row_step=self.dtype.itemsize * len(cloud),
            data=np.frombuffer(cloud.tobytes(), np.uint8), is_dense=xyz_finite)
        return ns, bytes(self.typestore.serialize_cdr(msg, POINTCLOUD2))


class McapWriter(PointWriter):
    """An MCAP file (profile ros2, zstd chunks): channel /cubecast/points, message encoding cdr, schema
    sensor_msgs/msg/PointCloud2 in ros2msg; log and publish time = the frame's stamp; the sequence counts
    the clouds from 0."""

    fmt = "mcap"

    def _begin(self) -> None:
        from mcap.writer import Writer
        self._ros = _Ros2Clouds()
        self._f = open(self.tmp, "wb")
        self._w = Writer(self._f)
        self._w.start(profile="ros2", library="cubecast")
        schema = self._w.register_schema(POINTCLOUD2, "ros2msg", self._ros.msgdef().encode())
        self._channel = self._w.register_channel(POINTS_TOPIC, "cdr", schema)

    def _frame(self, frame, timestamp_s, records, sensor_id) -> None:
        ns, data = self._ros.serialize(timestamp_s, records, sensor_id)
        self._w.add_message(self._channel, log_time=ns, data=data, publish_time=ns, sequence=self.frames % 2 ** 32)

    def _finish(self) -> Path:
        self._w.finish()
        self._f.close()
        return self.tmp

    def _abandon(self) -> None:
        f = getattr(self, "_f", None)
        if f is not None:
            f.close()


class RosbagWriter(PointWriter):
    """A ROS 2 bag (rosbags' writer: rosbag2 version 8, sqlite3 storage): topic /cubecast/points of
    sensor_msgs/msg/PointCloud2 in cdr, each message's bag time = its stamp. rosbags names the database
    after the folder, so the bag is written as a folder of the final name inside the temporary one."""

    fmt = "rosbag"
    folder = True
    io_errors = (OSError, sqlite3.Error)

    def _begin(self) -> None:
        from rosbags.rosbag2 import StoragePlugin, Writer
        self._ros = _Ros2Clouds()
        self._w = Writer(self.tmp / self.path.name, version=ROSBAG_VERSION, storage_plugin=StoragePlugin.SQLITE3)
        self._w.open()
        self._conn = self._w.add_connection(POINTS_TOPIC, POINTCLOUD2, typestore=self._ros.typestore)

    def _frame(self, frame, timestamp_s, records, sensor_id) -> None:
        ns, data = self._ros.serialize(timestamp_s, records, sensor_id)
        self._w.write(self._conn, ns, data)

    def _finish(self) -> Path:
        self._w.close()
        self._w = None
        return self.tmp / self.path.name

    def _abandon(self) -> None:
        w = getattr(self, "_w", None)
        if w is not None:
            w.abort()
            self._w = None


WRITERS: dict[str, type[PointWriter]] = {"csv": CsvWriter, "npz": NpzWriter, "pcd": PcdWriter, "ply": PlyWriter,
                                         "mcap": McapWriter, "rosbag": RosbagWriter}
assert tuple(WRITERS) == FORMATS
