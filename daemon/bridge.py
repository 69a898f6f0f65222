"""`cubecast bridge`: serve's stream, live, in a robotics web viewer speaking the Foxglove WebSocket protocol.

    cubecast bridge --sub tcp://127.0.0.1:5602 --websocket ws://127.0.0.1:8765

It subscribes to serve like any tracker (PointStream: every message decoded and validated by the wire
module, keys as `view` and `record` take them) and republishes, through the foxglove-sdk's WebSocket
server (the `bridge` extra), per sensor id SID:

    /SID/points        foxglove.PointCloud: the wire records as they are (80-byte stride), every field by
                       its name and type; `frame` (u64, which the schema has no type for) as the two
                       uint32 halves frame_lo and frame_hi; x, y, z also under the viewer's names x, y, z
                       (the sensor frame); frame id SID, stamp the ADC frame's timestamp
    /SID/transform     foxglove.FrameTransform: the sensor's pose on the platform (parent frame
                       `--platform-frame`, default "platform"; child SID), with every cloud, so that the
                       viewer draws several sensors in one frame; platform_x_m.. are in the records too
    /SID/rdmap         foxglove.Grid of the range-Doppler map: field level_db (float32, dB over the map's
                       median), rows range cells, columns velocity cells, cell size the steps, origin the
                       first cell's corner; frame id SID/range_doppler
    /SID/rdmap_image   foxglove.RawImage of the same map (encoding 32FC1; row 0 the nearest range cell)
    /SID/health        JSON: serve's health map, as the wire carries it
    /SID/frontend      JSON: the front end's monitor of each frame (seq, run, timestamp_s, full_scale, the
                       per-channel records as lists, nil where not finite, the warnings and their total), as
                       the wire's `frontend` header carries it
    /SID/sensor        JSON: the sensor summary, its digest and the full description

The viewer's stamps are seconds since the epoch that fit an unsigned 32-bit count: a message whose
timestamp does not (a negative one) is not sent, counted in `unstamped` and logged. Every message is
logged with the wall-clock time as its log time.

The viewer's protocol has no keys: whoever reaches the WebSocket gets the stream. So, like every other
endpoint here (netio's loopback-or-keys rule), only a loopback address is bound unless --insecure says
otherwise out loud (logged). To watch from another host, tunnel the loopback port (ssh -L).

The message building is pure (point_fields, cloud_message, grid_message, ...); the sockets live in
Bridge, the CLI in add_parser/run.
"""

from __future__ import annotations

import logging
import math
import re
import threading
from typing import Any

import numpy as np

from .errors import CubecastError
from .netio import DEFAULT_PUB, endpoint_problem, host_only, stop_on_signals
from .logs import RateLimitFilter, log_limited
from .wire import (FRONTEND_WIRE_FIELDS, HEALTH_FLOAT_FIELDS, HEALTH_INT_FIELDS, HEALTH_OPTIONAL_FLOAT_FIELDS,
                   POINT_WIRE_FIELDS, RECORD_DTYPE, pose_rotation)

DEFAULT_WEBSOCKET = "ws://127.0.0.1:8765"
PLATFORM_FRAME = "platform"
WS_EXPOSES = "the point clouds, range-Doppler maps, sensor descriptions, health and front-end monitors"
SUMMARY_EVERY_S = 10.0
MAX_STAMP_S = 2 ** 32 - 1  # the viewer's Timestamp: unsigned 32-bit seconds

log = logging.getLogger(__name__)

# numpy dtype of a wire field -> the PackedElementField numeric type's name (foxglove.messages)
_NUMERIC = {"<f4": "Float32", "<f8": "Float64", "<u4": "Uint32", "<i4": "Int32", "<u2": "Uint16", "<i2": "Int16",
            "|u1": "Uint8", "|i1": "Int8"}
# the viewer draws a cloud from fields named x, y, z (common practice for point clouds)
_XYZ = (("x", "x_m"), ("y", "y_m"), ("z", "z_m"))


# ---- pure: the viewer's messages from the wire's ----------------------------------------------------------

def point_fields() -> list[tuple[str, int, str]]:
    """(name, byte offset, numeric type) of every record field (wire.POINT_WIRE_FIELDS, in order), a 64-bit
    integer as its two 32-bit halves NAME_lo and NAME_hi (little-endian), then the aliases x, y, z."""
    out = []
    for name, _, dtype in POINT_WIRE_FIELDS:
        offset = RECORD_DTYPE.fields[name][1]
        if dtype in ("<u8", "<i8"):
            out += [(f"{name}_lo", offset, "Uint32"), (f"{name}_hi", offset + 4, "Uint32" if dtype == "<u8" else "Int32")]
        elif dtype in _NUMERIC:
            out.append((name, offset, _NUMERIC[dtype]))
        else:  # a layout change the bridge does not know yet: say so rather than send a wrong schema
            raise CubecastError(f"point field {name!r} has dtype {dtype!r}, which the bridge cannot describe")
    for alias, name in _XYZ:
        out.append((alias, RECORD_DTYPE.fields[name][1], _NUMERIC[RECORD_DTYPE.fields[name][0].str]))
    return out


def stamp_parts(timestamp_s: float) -> tuple[int, int] | None:
    """(seconds, nanoseconds) of a timestamp, or None when the viewer's stamp cannot hold it."""
    if not math.isfinite(timestamp_s) or not 0.0 <= timestamp_s <= MAX_STAMP_S:
        return None
    sec = math.floor(timestamp_s)
    nsec = min(999_999_999, int(round((timestamp_s - sec) * 1e9)))
    return int(sec), nsec


def pose_quaternion(pose: dict) -> tuple[list[float], list[float]]:
    """(translation [x, y, z] m, rotation quaternion [x, y, z, w]) of a summary's pose: the sensor frame's
    place in the platform frame (wire.pose_rotation takes sensor-frame vectors to the platform's)."""
    from scipy.spatial.transform import Rotation
    r = pose_rotation(pose["yaw_deg"], pose["pitch_deg"], pose["roll_deg"])
    return [float(v) for v in pose["position_m"]], [float(v) for v in Rotation.from_matrix(r).as_quat()]


def grid_layout(header: dict) -> dict:
    """The Grid's geometry of an rdmap header: cell centres at start + k * step (README "Wire format"),
    so the grid's origin is the first cell's corner; x along columns (velocity), y along rows (range)."""
    n_range, n_doppler = header["shape"]
    return {"column_count": int(n_doppler), "cell_size": (header["velocity_step_mps"], header["range_step_m"]),
            "origin": (header["velocity_start_mps"] - header["velocity_step_mps"] / 2,
                       header["range_start_m"] - header["range_step_m"] / 2),
            "row_stride": 4 * int(n_doppler), "cell_stride": 4}


def health_schema() -> dict:
    """A JSON schema of the health map (the wire's fields; others pass as they come)."""
    props: dict[str, Any] = {name: {"type": "integer"} for name in HEALTH_INT_FIELDS}
    props |= {name: {"type": "number"} for name in HEALTH_FLOAT_FIELDS}
    props |= {name: {"type": ["number", "null"]} for name in HEALTH_OPTIONAL_FLOAT_FIELDS}
    props["rejected"] = {"type": "object", "additionalProperties": {"type": "integer"}}
    return {"title": "cubecast.Health", "type": "object", "properties": props}


def frontend_schema() -> dict:
    """A JSON schema of the front end's monitor (the wire's `frontend` header)."""
    columns = {name: {"type": "array", "items": {"type": "integer"} if dtype == "<u4" else {"type": ["number", "null"]}}
               for name, _, dtype in FRONTEND_WIRE_FIELDS}
    warning = {"type": "object", "properties": {"rx": {"type": "integer"}, "cause": {"type": "string"},
                                                "value": {"type": ["number", "null"]}, "short": {"type": "string"},
                                                "text": {"type": "string"}}}
    return {"title": "cubecast.FrontEnd", "type": "object",
            "properties": {"sensor_id": {"type": "string"}, "seq": {"type": "integer"}, "run": {"type": "string"},
                           "timestamp_s": {"type": "number"}, "full_scale": {"type": "number"},
                           "records": {"type": "object", "properties": columns},
                           "warnings": {"type": "array", "items": warning}, "warnings_total": {"type": "integer"}}}


def frontend_json(sensor_id: str, header: dict) -> dict:
    """The JSON message of one `frontend` wire header: its fields as they are (records per field, one
    entry per receive channel; nil where the value is not finite)."""
    keep = ("seq", "run", "timestamp_s", "full_scale", "records", "warnings", "warnings_total")
    return {"sensor_id": sensor_id} | {k: header[k] for k in keep}


SENSOR_SCHEMA = {"title": "cubecast.Sensor", "type": "object",
                 "properties": {"sensor_id": {"type": "string"}, "digest": {"type": "string"},
                                "summary": {"type": "object"}, "sensor_toml": {"type": "string"}}}


# ---- the WebSocket address and its exposure ---------------------------------------------------------------

_WS = re.compile(r"ws://(\[[^\]]*\]|[^:/\[\]]+):([^/]*)/?")


def parse_websocket(url: str, insecure: bool = False) -> tuple[str, int]:
    """(host, port) to bind for --websocket ws://HOST:PORT (port 0: a free one). A host other hosts can
    reach is refused without `insecure` (the viewer's protocol has no keys), and logged with it."""
    m = _WS.fullmatch(url) if isinstance(url, str) else None
    if m is None:
        raise CubecastError(f"--websocket {url}: must be ws://HOST:PORT (e.g. {DEFAULT_WEBSOCKET})")
    host, port = m.groups()
    problem = endpoint_problem(f"tcp://{host}:{port}", bind=True)
    if problem is None and (host == "*" or port == "*"):
        problem = "a wildcard: give an address (0.0.0.0 for every interface) and a port (0 for a free one)"
    if problem:
        raise CubecastError(f"--websocket {url}: {problem}")
    if not host_only(f"tcp://{host}:{port}"):
        if not insecure:
            raise CubecastError(f"--websocket {url}: reachable from other hosts, and the viewer's WebSocket protocol "
                                f"has no keys: anyone who reaches it would get {WS_EXPOSES}. Bind a loopback address "
                                "(127.0.0.1; from another host, tunnel to it: ssh -L), or pass --insecure to allow it")
        log.warning("--websocket %s: bound without keys (--insecure): anyone who can reach it gets %s, neither "
                    "authenticated nor encrypted", url, WS_EXPOSES, extra={"endpoint": url, "insecure": True})
    return host.strip("[]"), int(port)


# ---- the bridge ---------------------------------------------------------------------------------------

class Bridge:
    """Subscribe to `sub` (serve's publish endpoint) and serve its stream on a Foxglove WebSocket server.

    bridge = Bridge(sub, "ws://127.0.0.1:0"); bridge.start(); bridge.port; bridge.run(stop_event)
    sensor_id: one sensor only. server_key / key: CURVE keys for a serve that requires them."""

    def __init__(self, sub: str = DEFAULT_PUB, websocket: str = DEFAULT_WEBSOCKET, *, sensor_id: str | None = None,
                 server_key=None, key=None, insecure: bool = False, platform_frame: str = PLATFORM_FRAME,
                 name: str = "cubecast bridge"):
        problem = endpoint_problem(sub, bind=False)
        if problem:
            raise CubecastError(f"--sub {sub}: {problem}")
        if not isinstance(platform_frame, str) or not platform_frame.strip():
            raise CubecastError(f"--platform-frame {platform_frame!r}: must name a frame")
        self.sub, self.websocket, self.sensor_id = sub, websocket, sensor_id
        if (server_key is None) != (key is None):
            raise CubecastError("--server-key and --key: give both (serve's public key and this side's secret key) "
                                "or neither")
        from .keys import ClientKeys
        self.keys = None if server_key is None else ClientKeys.from_files(server_key, key, server_role="--server-key",
                                                                         key_role="--key")
        self.platform_frame, self.name = platform_frame, name
        self.host, self.requested_port = parse_websocket(websocket, insecure)
        self.counts = {"clouds": 0, "points": 0, "rdmaps": 0, "health": 0, "sensor": 0, "frontend": 0,
                       "unstamped": 0}
        self._channels: dict[tuple[str, str], Any] = {}
        self._summaries: dict[str, dict] = {}
        self._limit = RateLimitFilter(5.0)
        self._fields = None
        self.server = self.context = None
        self.stream = None

    @property
    def port(self) -> int | None:
        return self.server.port if self.server is not None else None

    @property
    def url(self) -> str | None:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"ws://{host}:{self.port}" if self.server is not None else None

    def start(self) -> int:
        """Start the WebSocket server (the subscriber comes with run()); returns the bound port."""
        foxglove = _foxglove()
        if self.server is None:
            from foxglove.messages import PackedElementField, PackedElementFieldNumericType
            self._fields = [PackedElementField(name=n, offset=o, type=getattr(PackedElementFieldNumericType, t))
                            for n, o, t in point_fields()]
            self.context = foxglove.Context()
            try:
                self.server = foxglove.start_server(name=self.name, host=self.host, port=self.requested_port,
                                                    context=self.context)
            except Exception as exc:  # the SDK raises its own error types (an address in use, say)
                raise CubecastError(f"--websocket {self.websocket}: cannot bind: {exc}") from None
            log.info("cubecast bridge: serving %s (Foxglove WebSocket protocol) from %s", self.url, self.sub)
        return self.port

    def run(self, stop: threading.Event | None = None) -> dict:
        """Forward until `stop` is set; returns the counts (the stream's too)."""
        from .pointstream import PointStream
        stop = stop or threading.Event()
        self.start()
        try:
            self.stream = PointStream(self.sub, sensor_id=self.sensor_id, keys=self.keys, rdmap=True, frontend=True,
                                      stop=stop)
            while True:
                msg = self.stream.next_message(timeout_s=None)
                if msg is None:
                    break
                self.forward(msg)
        finally:
            self.close()
        return self.stats()

    def stats(self) -> dict:
        out = dict(self.counts)
        if self.stream is not None:
            out["stream"] = self.stream.stats()
        return out

    def close(self) -> None:
        self._limit.flush(log, force=True, prefix="cubecast bridge: ")
        if self.stream is not None:
            self.stream.close()
            s = self.stream.stats()
            log.info("cubecast bridge: stopped: %d clouds (%d points), %d maps, %d health, %d not stamped; from %s: "
                     "refused %s, gaps %d, reconnects %d", self.counts["clouds"], self.counts["points"],
                     self.counts["rdmaps"], self.counts["health"], self.counts["unstamped"], self.sub,
                     s["dropped"] or "none", s["gaps"], s["reconnects"])
        if self.server is not None:
            self.server.stop()
            self.server = None

    # ---- one message of the wire -> the viewer's ----

    def _channel(self, sid: str, what: str):
        ch = self._channels.get((sid, what))
        if ch is None:
            import foxglove
            from foxglove import channels
            topic, ctx = f"/{sid}/{what}", self.context
            ch = {"points": lambda: channels.PointCloudChannel(topic, context=ctx),
                  "transform": lambda: channels.FrameTransformChannel(topic, context=ctx),
                  "rdmap": lambda: channels.GridChannel(topic, context=ctx),
                  "rdmap_image": lambda: channels.RawImageChannel(topic, context=ctx),
                  "health": lambda: foxglove.Channel(topic, schema=health_schema(), context=ctx),
                  "frontend": lambda: foxglove.Channel(topic, schema=frontend_schema(), context=ctx),
                  "sensor": lambda: foxglove.Channel(topic, schema=SENSOR_SCHEMA, context=ctx)}[what]()
            self._channels[(sid, what)] = ch
        return ch

    def _stamp(self, sid: str, kind: str, timestamp_s: float):
        from foxglove.messages import Timestamp
        parts = stamp_parts(timestamp_s)
        if parts is None:
            self.counts["unstamped"] += 1
            log_limited(log, self._limit, logging.WARNING, "unstamped", "cubecast bridge: sensor '%s': a %s with "
                        "timestamp_s %r is not sent: the viewer's stamps hold 0..%d s", sid, kind, timestamp_s,
                        MAX_STAMP_S)
            return None
        return Timestamp(*parts)

    def forward(self, msg) -> None:
        """Republish one StreamMessage of the PointStream."""
        kind, sid, value = msg
        if kind == "points":
            self._cloud(sid, value)
        elif kind == "rdmap":
            self._rdmap(sid, value)
        elif kind == "health":
            self._channel(sid, "health").log(value)
            self.counts["health"] += 1
        elif kind == "frontend":
            self._channel(sid, "frontend").log(frontend_json(sid, value.header))
            self.counts["frontend"] += 1
        elif kind == "sensor":
            self._summaries[sid] = value.summary
            self._channel(sid, "sensor").log({"sensor_id": sid, "digest": value.digest, "summary": value.summary,
                                              "sensor_toml": value.sensor_toml})
            self.counts["sensor"] += 1

    def _cloud(self, sid: str, cloud) -> None:
        from foxglove.messages import FrameTransform, PointCloud, Pose, Quaternion, Vector3
        stamp = self._stamp(sid, "point cloud", cloud.timestamp_s)
        if stamp is None:
            return
        summary = self._summaries.get(sid)
        if summary is not None:
            t, q = pose_quaternion(summary["pose"])
            self._channel(sid, "transform").log(FrameTransform(
                timestamp=stamp, parent_frame_id=self.platform_frame, child_frame_id=sid,
                translation=Vector3(x=t[0], y=t[1], z=t[2]), rotation=Quaternion(x=q[0], y=q[1], z=q[2], w=q[3])))
        identity = Pose(position=Vector3(x=0.0, y=0.0, z=0.0), orientation=Quaternion(x=0.0, y=0.0, z=0.0, w=1.0))
        self._channel(sid, "points").log(PointCloud(
            timestamp=stamp, frame_id=sid, pose=identity, point_stride=RECORD_DTYPE.itemsize, fields=self._fields,
            data=np.ascontiguousarray(cloud.points).tobytes()))
        self.counts["clouds"] += 1
        self.counts["points"] += len(cloud.points)

    def _rdmap(self, sid: str, msg) -> None:
        from foxglove.messages import Grid, PackedElementField, PackedElementFieldNumericType, Pose, Quaternion
        from foxglove.messages import RawImage, Vector2, Vector3
        stamp = self._stamp(sid, "range-Doppler map", msg.header["timestamp_s"])
        if stamp is None:
            return
        g = grid_layout(msg.header)
        data = np.ascontiguousarray(msg.data, "<f4").tobytes()
        frame = f"{sid}/range_doppler"
        origin = Pose(position=Vector3(x=g["origin"][0], y=g["origin"][1], z=0.0),
                      orientation=Quaternion(x=0.0, y=0.0, z=0.0, w=1.0))
        self._channel(sid, "rdmap").log(Grid(
            timestamp=stamp, frame_id=frame, pose=origin, column_count=g["column_count"],
            cell_size=Vector2(x=g["cell_size"][0], y=g["cell_size"][1]), row_stride=g["row_stride"],
            cell_stride=g["cell_stride"], data=data,
            fields=[PackedElementField(name="level_db", offset=0, type=PackedElementFieldNumericType.Float32)]))
        n_range, n_doppler = msg.header["shape"]
        self._channel(sid, "rdmap_image").log(RawImage(
            timestamp=stamp, frame_id=frame, width=int(n_doppler), height=int(n_range), encoding="32FC1",
            step=4 * int(n_doppler), data=data))
        self.counts["rdmaps"] += 1


def _foxglove():
    try:
        import foxglove
    except ImportError as exc:
        raise CubecastError(f"the bridge needs the foxglove-sdk ({exc}); install with: pip install -e '.[bridge]'") \
            from None
    return foxglove


# ---- the CLI ------------------------------------------------------------------------------------------

def add_parser(subparsers):
    """Add the `bridge` subcommand to an argparse subparsers object; returns its parser."""
    p = subparsers.add_parser("bridge", help="serve's points, range-Doppler maps and health, live, to a robotics web "
                                             "viewer over the Foxglove WebSocket protocol (needs the bridge extra)")
    p.add_argument("--sub", default=DEFAULT_PUB, metavar="ENDPOINT",
                   help=f"serve's publish endpoint to connect to (default {DEFAULT_PUB})")
    p.add_argument("--websocket", default=DEFAULT_WEBSOCKET, metavar="ws://HOST:PORT",
                   help=f"where the viewer connects (default {DEFAULT_WEBSOCKET}; port 0: a free one, logged)")
    p.add_argument("--sensor", metavar="ID", help="only this sensor (default: every sensor on the bus)")
    p.add_argument("--platform-frame", default=PLATFORM_FRAME, metavar="NAME",
                   help=f"the frame id the sensors' poses are given in (default {PLATFORM_FRAME})")
    p.add_argument("--seconds", type=float, default=0.0, metavar="S", help="stop after S seconds (default: SIGINT "
                                                                            "or SIGTERM)")
    p.add_argument("--insecure", action="store_true",
                   help="allow a WebSocket address other hosts can reach (the viewer's protocol has no keys; the log "
                        "says what it exposes); without it only loopback addresses are bound")
    g = p.add_argument_group("keys (CURVE; see `cubecast keys`)")
    g.add_argument("--server-key", metavar="FILE", help="serve's public key (NAME.key), when it requires keys")
    g.add_argument("--key", metavar="FILE", help="with --server-key: this side's secret key (NAME.key_secret); its "
                                                 "public key must be in serve's --client-keys folder")
    p.set_defaults(func=run)
    return p


def run(args) -> int:
    if args.seconds < 0 or not math.isfinite(args.seconds):
        raise CubecastError(f"--seconds {args.seconds!r}: must be a number of seconds >= 0 (0: until a signal)")
    if args.sensor is not None:
        from .wire import SENSOR_ID_RULE, valid_sensor_id
        if not valid_sensor_id(args.sensor):
            raise CubecastError(f"--sensor {args.sensor!r}: must be {SENSOR_ID_RULE}")
    bridge = Bridge(args.sub, args.websocket, sensor_id=args.sensor, server_key=args.server_key, key=args.key,
                    insecure=args.insecure, platform_frame=args.platform_frame)
    stop = threading.Event()
    timer = threading.Timer(args.seconds, stop.set) if args.seconds > 0 else None
    with stop_on_signals(stop):
        bridge.start()
        if timer is not None:
            timer.daemon = True
            timer.start()
        try:
            bridge.run(stop)
        finally:
            if timer is not None:
                timer.cancel()
    return 0
