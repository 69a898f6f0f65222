"""cubecast wire format, version 3: encode and decode every message kind (pure functions, no sockets).

The contract is README "Wire format". Every message is three parts:

    [ topic b"<sensor_id>/<kind>" , header (msgpack map, string keys) , payload (raw bytes, may be empty) ]

Encoders return the three parts as a list (the payload a zero-copy memoryview of the array passed in;
the caller must not modify that array afterwards, since ZeroMQ may still be sending it). `decode`
validates everything before any value is used: sizes first (topic, header, payload), then msgpack
with bounded lengths (no pickle, no eval, no ext types), then every header field's type and range
against the kind's schema (the Structs below; daemon/schema.py), then the payload against the
header (length, CRC-32). A failure raises WireError, a CubecastError with `reason` (one of REASONS)
and a message naming the field, its value and the rule.

Header keys a kind does not define are ignored (forward compatibility within a version).

This module is the contract shared by the daemon, the workers and the viewer: it imports nothing of
the chain or the service (the viewer imports it), only errors.py and schema.py.
"""

from __future__ import annotations

import math
import re
import zlib
from dataclasses import dataclass
from typing import TYPE_CHECKING, Annotated, Any, Literal, Sequence

import msgpack
import numpy as np
from msgspec import Meta, defstruct

from .errors import CubecastError
from .schema import (MAX_ENTRIES, MAX_FLOAT, Count, Digest, Finite, NonNegative, Positive, Schema, integer, optional,
                     shape_rule, short, text, unpack, validate)

if TYPE_CHECKING:
    from .sensor import Sensor

WIRE_VERSION = 3  # 3: the `frontend` kind and the `cell_sources` field (80-byte records); 2: the platform fields
KINDS = ("adc", "points", "rdmap", "sensor", "health", "frontend")
REASONS = ("malformed", "wire_version", "unknown_sensor", "digest", "shape", "dtype", "crc", "repeated",
           "oversized")
ADC_DTYPES = ("<c8", "<i2", "<f4")

MAX_TOPIC_BYTES = 256
MAX_HEADER_BYTES = 64 * 1024
MAX_SENSOR_HEADER_BYTES = 1024 * 1024
DEFAULT_MAX_PAYLOAD_BYTES = 256 * 1024 * 1024  # generic bound; serve passes its sensor's exact frame size
MAX_NDIM = 4
MAX_DIM = 1 << 31
MAX_RUN_CHARS = 64
MAX_SENSOR_ID_CHARS = 64
MAX_FIELD_ENTRIES = MAX_ENTRIES  # msgpack array and map lengths
RDMAP_MAX_RANGE_CELLS = 128
RDMAP_MAX_DOPPLER_CELLS = 64

# The sensor file's rule for ids (sensor.py: letters, digits, '-', '_' or '.'); `\w` is exactly
# str.isalnum() plus '_'. At most 64 characters on the wire; never '/', which ends the id in a topic.
SENSOR_ID_RULE = f"1..{MAX_SENSOR_ID_CHARS} letters, digits, '-', '_' or '.'"
SENSOR_ID_PATTERN = r"[\w.-]{1,%d}" % MAX_SENSOR_ID_CHARS   # the sensor file's [sensor] id follows it too
_SENSOR_ID_RE = re.compile(SENSOR_ID_PATTERN)

# [name, unit, dtype] of each record field, in order: 80 bytes, no padding (README "Wire format").
# The chain's point records (chain/points.RECORD_DTYPE) have exactly this layout (tests check it).
POINT_WIRE_FIELDS: tuple[tuple[str, str, str], ...] = (
    ("frame", "", "<u8"), ("timestamp_s", "s", "<f8"),
    ("x_m", "m", "<f4"), ("y_m", "m", "<f4"), ("z_m", "m", "<f4"),
    ("range_m", "m", "<f4"), ("azimuth_deg", "deg", "<f4"), ("elevation_deg", "deg", "<f4"),
    ("velocity_mps", "m/s", "<f4"), ("snr_db", "dB", "<f4"),
    ("sigma_range_m", "m", "<f4"), ("sigma_azimuth_deg", "deg", "<f4"),
    ("sigma_elevation_deg", "deg", "<f4"), ("sigma_velocity_mps", "m/s", "<f4"),
    ("platform_x_m", "m", "<f4"), ("platform_y_m", "m", "<f4"), ("platform_z_m", "m", "<f4"),
    ("cell_sources", "", "<f4"),
)
RECORD_DTYPE = np.dtype([(name, dtype) for name, _, dtype in POINT_WIRE_FIELDS])
assert RECORD_DTYPE.itemsize == 80
_FIELDS_LIST = [list(f) for f in POINT_WIRE_FIELDS]
FIELDS_RULE = ("must be exactly the record layout of README's wire format (80-byte records, frame <u8, timestamp_s <f8, "
               "then 16 <f4 fields)")

SENSOR_SUMMARY_KEYS = ("pose", "max_range_m", "max_velocity_mps", "fov_half_azimuth_deg", "fov_half_elevation_deg",
                       "range_resolution_m", "velocity_resolution_mps")
# The front end's monitor record (chain/frontend.FRONTEND_DTYPE has exactly these fields; tests check
# it): one per receive channel and frame, [name, unit, dtype]. README "Wire format", kind `frontend`.
FRONTEND_WIRE_FIELDS: tuple[tuple[str, str, str], ...] = (
    ("clipped_samples", "", "<u4"), ("samples", "", "<u4"), ("interference_bursts", "", "<u4"),
    ("interference_samples", "", "<u4"), ("noise_floor_db", "dB", "<f4"), ("dc_offset_counts", "counts", "<f4"),
    ("image_rejection_db", "dB", "<f4"),
)
FRONTEND_RECORD_DTYPE = np.dtype([(name, dtype) for name, _, dtype in FRONTEND_WIRE_FIELDS])
# what a front-end warning can name (daemon/frontendwarn.py makes them)
FRONTEND_CAUSES = ("clipping", "interference", "dc_offset", "image_rejection", "noise_floor_high",
                   "noise_floor_low", "no_signal")
FRONTEND_MAX_CHANNELS = 256
FRONTEND_MAX_WARNINGS = 64  # per message; `warnings_total` counts them all
FRONTEND_MAX_TEXT_CHARS = 300
# health's `frontend.channels`: per receive channel over the interval (a list per name, one entry per rx)
FRONTEND_SUMMARY_FIELDS: tuple[tuple[str, str], ...] = (
    ("clipped_percent_max", "%"), ("clipped_percent_mean", "%"), ("interference_bursts_max", ""),
    ("interference_bursts_total", ""), ("interference_share_percent_max", "%"),
    ("interference_share_percent_mean", "%"), ("noise_floor_db_mean", "dB"), ("noise_floor_db_max", "dB"),
    ("dc_offset_counts_max", "counts"), ("image_rejection_db_min", "dB"),
)
FRONTEND_SUMMARY_COUNTS = ("interference_bursts_max", "interference_bursts_total")  # integers; the rest numbers or nil

HEALTH_INT_FIELDS = ("frames_received", "frames_processed", "frames_dropped", "frames_rejected",
                     "sequence_gaps", "source_restarts", "queue_depth", "points_last")
HEALTH_FLOAT_FIELDS = ("uptime_s", "cpu_share", "fps")
HEALTH_OPTIONAL_FLOAT_FIELDS = ("latency_p50_ms", "latency_p99_ms")  # nil when no frame in the interval


class WireError(CubecastError):
    """A message that breaks the wire contract; `reason` is one of REASONS."""

    def __init__(self, reason: str, message: str):
        assert reason in REASONS, reason
        super().__init__(message)
        self.reason = reason


# ---- the schema of each kind's header (besides wire, kind and sensor_id, checked against the topic) ----

# (annotations are names of module-level types: the Structs' string annotations resolve to these)
Seq = Count  # 0..2^64-1: the records' `frame` field and the capture's sequence are u64
RunId = text(MAX_RUN_CHARS)
AdcShape = shape_rule(1, MAX_NDIM, MAX_DIM)
MapShape = shape_rule(2, 2, MAX_DIM)
Crc32 = integer(0, 0xFFFFFFFF)
PointCount = integer(0, MAX_DIM)
SensorToml = text(MAX_SENSOR_HEADER_BYTES)
NonNegativeOrNil = optional(NonNegative)


class AdcHeader(Schema):
    seq: Seq
    run: RunId
    timestamp_s: Finite
    digest: Digest
    dtype: Annotated[Literal[ADC_DTYPES], Meta(description=f"must be one of {', '.join(ADC_DTYPES)}",
                                               extra={"reason": "dtype"})]
    shape: AdcShape
    crc32: Crc32


class PointsHeader(Schema):
    seq: Seq
    run: RunId
    timestamp_s: Finite
    latency_s: NonNegative
    count: PointCount
    fields: Annotated[list, Meta(description=FIELDS_RULE, extra={"reason": "dtype"})]


class RdmapHeader(Schema):
    seq: Seq
    timestamp_s: Finite
    shape: MapShape
    dtype: Annotated[Literal["<f4"], Meta(description="must be '<f4'", extra={"reason": "dtype"})]
    range_start_m: Finite
    range_step_m: Positive
    velocity_start_mps: Finite
    velocity_step_mps: Positive
    unit: Annotated[Literal["dB"], Meta(description="must be 'dB'")]


Position3 = Annotated[list[Finite], Meta(min_length=3, max_length=3, description="must be [x, y, z], 3 finite numbers")]


class SensorPose(Schema):
    position_m: Position3
    yaw_deg: Annotated[float, Meta(ge=-180.0, le=180.0, description="must be a number in -180..180")]
    pitch_deg: Annotated[float, Meta(ge=-90.0, le=90.0, description="must be a number in -90..90")]
    roll_deg: Annotated[float, Meta(ge=-180.0, le=180.0, description="must be a number in -180..180")]


class SensorSummary(Schema):
    max_range_m: Positive
    max_velocity_mps: Positive
    fov_half_azimuth_deg: Positive
    fov_half_elevation_deg: Positive
    range_resolution_m: Positive
    velocity_resolution_mps: Positive
    pose: Annotated[SensorPose, Meta(description="must be a map")]
    mount_height_m: NonNegativeOrNil = None


class SensorHeader(Schema):
    digest: Digest
    sensor_toml: SensorToml
    summary: Annotated[SensorSummary, Meta(description="must be a map")]


U32 = integer(0, 0xFFFFFFFF)
FiniteOrNil = optional(Finite)
_COLUMN_RULE = f"must be a list of 1..{FRONTEND_MAX_CHANNELS} "


def _column(element: Any, what: str) -> Any:
    return Annotated[list[element], Meta(min_length=1, max_length=FRONTEND_MAX_CHANNELS,
                                         description=_COLUMN_RULE + what + " (one per receive channel)")]


_U32_ELEMENT = Annotated[int, Meta(ge=0, le=0xFFFFFFFF)]
_COUNT_ELEMENT = Annotated[int, Meta(ge=0)]
_FINITE_ELEMENT = Annotated[float, Meta(ge=-MAX_FLOAT, le=MAX_FLOAT)] | None

# the per-channel columns of a `frontend` message and of health's `frontend`, generated from the field
# lists above so that they cannot drift apart
FrontendRecords = defstruct("FrontendRecords", [
    (name, _column(_U32_ELEMENT, "integers in 0..4294967295") if dtype == "<u4"
     else _column(_FINITE_ELEMENT, "finite numbers or nil")) for name, _, dtype in FRONTEND_WIRE_FIELDS],
    bases=(Schema,), frozen=True)
FrontendSummaryColumns = defstruct("FrontendSummaryColumns", [
    (name, _column(_COUNT_ELEMENT, "integers >= 0") if name in FRONTEND_SUMMARY_COUNTS
     else _column(_FINITE_ELEMENT, "finite numbers or nil")) for name, _ in FRONTEND_SUMMARY_FIELDS],
    bases=(Schema,), frozen=True)
Cause = Annotated[Literal[FRONTEND_CAUSES], Meta(description=f"must be one of {', '.join(FRONTEND_CAUSES)}")]
Rx = integer(0, FRONTEND_MAX_CHANNELS - 1)
WarningText = text(FRONTEND_MAX_TEXT_CHARS)


class FrontendWarning(Schema):
    rx: Rx
    cause: Cause
    value: Finite
    short: WarningText
    text: WarningText


FrontendWarnings = Annotated[list[FrontendWarning], Meta(max_length=FRONTEND_MAX_WARNINGS, description=(
    f"must be a list of at most {FRONTEND_MAX_WARNINGS} maps {{rx, cause, value, short, text}}"))]


class FrontendHeader(Schema):
    seq: Seq
    run: RunId
    timestamp_s: Finite
    full_scale: Positive
    records: Annotated[FrontendRecords, Meta(description="must be a map of per-channel lists")]
    warnings: FrontendWarnings
    warnings_total: Count


class FrontendHealth(Schema):
    frames: Count
    frames_with_warnings: Count
    warnings: Annotated[dict[Literal[FRONTEND_CAUSES], Count],
                        Meta(description=f"must map causes ({', '.join(FRONTEND_CAUSES)}) to counts >= 0")]
    channels: Annotated[FrontendSummaryColumns, Meta(description="must be a map of per-channel lists")]


OptionalFrontendHealth = Annotated[FrontendHealth | None, Meta(description="must be nil or a map")]


class HealthHeader(Schema):
    frames_received: Count
    frames_processed: Count
    frames_dropped: Count
    frames_rejected: Count
    sequence_gaps: Count
    source_restarts: Count
    queue_depth: Count
    points_last: Count
    uptime_s: NonNegative
    cpu_share: NonNegative
    fps: NonNegative
    latency_p50_ms: NonNegativeOrNil  # nil when no frame was processed in the interval
    latency_p99_ms: NonNegativeOrNil
    rejected: Annotated[dict[Literal[REASONS], Count],
                        Meta(description=f"must map reasons ({', '.join(REASONS)}) to counts >= 0")]
    frontend: OptionalFrontendHealth = None  # nil when no frame was processed in the interval


SCHEMAS: dict[str, type[Schema]] = {"adc": AdcHeader, "points": PointsHeader, "rdmap": RdmapHeader,
                                    "sensor": SensorHeader, "health": HealthHeader,
                                    "frontend": FrontendHeader}


@dataclass(frozen=True)
class Message:
    """A decoded, validated message. `data` is a read-only numpy view on the payload: the ADC frame
    (header dtype and shape) for `adc`, RECORD_DTYPE records for `points`, float32 [range, doppler]
    for `rdmap`, FRONTEND_RECORD_DTYPE records (one per receive channel, nil as NaN) for `frontend`,
    None for `sensor` and `health`."""

    kind: str
    sensor_id: str
    header: dict
    payload: memoryview
    data: np.ndarray | None = None

    @property
    def topic(self) -> str:
        return f"{self.sensor_id}/{self.kind}"

    @property
    def seq(self) -> int | None:
        return self.header.get("seq")

    @property
    def run(self) -> str | None:
        return self.header.get("run")

    @property
    def timestamp_s(self) -> float | None:
        return self.header.get("timestamp_s")


def valid_sensor_id(sensor_id: Any) -> bool:
    return isinstance(sensor_id, str) and _SENSOR_ID_RE.fullmatch(sensor_id) is not None


# ---- encoding ---------------------------------------------------------------------------------

def topic_of(sensor_id: str, kind: str) -> bytes:
    return f"{sensor_id}/{kind}".encode("utf-8")


def _pack(kind: str, sensor_id: str, fields: dict) -> bytes:
    header = {"wire": WIRE_VERSION, "kind": kind, "sensor_id": sensor_id}
    header.update(fields)
    data = msgpack.packb(header, use_bin_type=True)
    limit = MAX_SENSOR_HEADER_BYTES if kind == "sensor" else MAX_HEADER_BYTES
    if len(data) > limit:
        raise WireError("oversized", f"{kind} header is {len(data)} bytes; the wire allows at most {limit}")
    return data


def _check_sensor_id(sensor_id: str) -> None:
    if not valid_sensor_id(sensor_id):
        raise WireError("malformed", f"sensor_id {sensor_id!r}: must be {SENSOR_ID_RULE}")


def _array_view(arr: np.ndarray) -> memoryview:
    return memoryview(arr.reshape(-1).view(np.uint8))


def encode_adc(sensor_id: str, seq: int, run: str, timestamp_s: float, payload: np.ndarray,
               digest: str) -> list:
    """One ADC frame. `payload` in the sensor's ADC format or canonical complex64; it is sent without a
    copy, so do not modify it afterwards."""
    _check_sensor_id(sensor_id)
    dt = payload.dtype.newbyteorder("<") if payload.dtype.byteorder == ">" else payload.dtype
    if dt.str not in ADC_DTYPES:
        raise WireError("dtype", f"adc payload dtype {payload.dtype}: must be one of {', '.join(ADC_DTYPES)}")
    arr = np.ascontiguousarray(payload, dtype=np.dtype(dt.str))
    view = _array_view(arr)
    header = _pack("adc", sensor_id, {
        "seq": int(seq), "run": str(run), "timestamp_s": float(timestamp_s), "dtype": arr.dtype.str,
        "shape": [int(d) for d in arr.shape], "digest": str(digest), "crc32": zlib.crc32(view)})
    return [topic_of(sensor_id, "adc"), header, view]


def encode_points(sensor_id: str, seq: int, run: str, timestamp_s: float, latency_s: float,
                  records: np.ndarray) -> list:
    """One point cloud: RECORD_DTYPE records (sent without a copy: do not modify them afterwards)."""
    _check_sensor_id(sensor_id)
    if records.dtype != RECORD_DTYPE or records.ndim != 1:
        raise WireError("dtype", f"points records have dtype {records.dtype} shape {records.shape}; "
                                 f"expected a 1-D array of RECORD_DTYPE")
    arr = np.ascontiguousarray(records)
    header = _pack("points", sensor_id, {
        "seq": int(seq), "run": str(run), "timestamp_s": float(timestamp_s), "latency_s": float(latency_s),
        "count": int(arr.shape[0]), "fields": [list(f) for f in POINT_WIRE_FIELDS]})
    return [topic_of(sensor_id, "points"), header, _array_view(arr) if arr.size else b""]


def encode_rdmap(sensor_id: str, seq: int, timestamp_s: float, values_db: np.ndarray, range_start_m: float,
                 range_step_m: float, velocity_start_mps: float, velocity_step_mps: float) -> list:
    """A display map: float32 dB [n_range, n_doppler], at most 128 x 64 cells; the axes as the header's
    rules say (finite starts, steps > 0), else WireError naming the field and value."""
    _check_sensor_id(sensor_id)
    arr = np.ascontiguousarray(values_db, dtype="<f4")
    if arr.ndim != 2 or not (0 < arr.shape[0] <= RDMAP_MAX_RANGE_CELLS and 0 < arr.shape[1] <= RDMAP_MAX_DOPPLER_CELLS):
        raise WireError("shape", f"rdmap shape {list(arr.shape)}: must be [n_range, n_doppler] with "
                                 f"1..{RDMAP_MAX_RANGE_CELLS} x 1..{RDMAP_MAX_DOPPLER_CELLS} cells")
    fields = {
        "seq": int(seq), "timestamp_s": float(timestamp_s), "shape": [int(arr.shape[0]), int(arr.shape[1])],
        "dtype": "<f4", "range_start_m": float(range_start_m), "range_step_m": float(range_step_m),
        "velocity_start_mps": float(velocity_start_mps), "velocity_step_mps": float(velocity_step_mps),
        "unit": "dB"}
    validate(fields, RdmapHeader, "rdmap", WireError)  # a step <= 0 or a non-finite axis is never sent
    return [topic_of(sensor_id, "rdmap"), _pack("rdmap", sensor_id, fields), _array_view(arr)]


def pose_rotation(yaw_deg: float, pitch_deg: float, roll_deg: float) -> np.ndarray:
    """The rotation [3, 3] of a pose (a sensor file's [pose], a `sensor` summary's `pose`; the viewer
    draws with it too) taking sensor-frame vectors to the platform frame (both x right, y forward
    or boresight, z up): yaw about the platform's z, positive turning the boresight right (clockwise
    seen from above, as azimuth); then pitch about the sensor's own x, positive tilting the boresight
    up (as elevation); then roll about the sensor's own boresight, positive lowering its right side.
    Intrinsic z-x'-y'' Tait-Bryan angles: R = Rz(yaw) Rx(pitch) Ry(roll)."""
    y, p, r = (math.radians(a) for a in (yaw_deg, pitch_deg, roll_deg))
    rz = np.array([[math.cos(y), math.sin(y), 0.0], [-math.sin(y), math.cos(y), 0.0], [0.0, 0.0, 1.0]])
    rx = np.array([[1.0, 0.0, 0.0], [0.0, math.cos(p), -math.sin(p)], [0.0, math.sin(p), math.cos(p)]])
    ry = np.array([[math.cos(r), 0.0, math.sin(r)], [0.0, 1.0, 0.0], [-math.sin(r), 0.0, math.cos(r)]])
    return rz @ rx @ ry


def sensor_summary(sensor: Sensor, velocity_unfolding: bool = True) -> dict:
    return {
        "max_range_m": float(sensor.max_range_m),
        "max_velocity_mps": float(sensor.max_velocity_unfolded_mps if velocity_unfolding and sensor.n_slots > 1
                                  else sensor.max_velocity_mps),
        "fov_half_azimuth_deg": float(sensor.fov_half_azimuth_deg),
        "fov_half_elevation_deg": float(sensor.fov_half_elevation_deg),
        "range_resolution_m": float(sensor.range_resolution_m),
        "velocity_resolution_mps": float(sensor.velocity_resolution_mps),
        "pose": sensor.pose_summary(),
    } | ({} if sensor.mount_height_m is None else {"mount_height_m": float(sensor.mount_height_m)})


def encode_sensor(sensor: Sensor, velocity_unfolding: bool = True) -> list:
    _check_sensor_id(sensor.sensor_id)
    header = _pack("sensor", sensor.sensor_id, {
        "digest": sensor.digest, "sensor_toml": sensor.source_text,
        "summary": sensor_summary(sensor, velocity_unfolding)})
    return [topic_of(sensor.sensor_id, "sensor"), header, b""]


def encode_health(sensor_id: str, fields: dict) -> list:
    """`fields`: the health map of README "Wire format" (validated here as a receiver would, so a bug cannot put
    an invalid message on the bus)."""
    _check_sensor_id(sensor_id)
    header = _pack("health", sensor_id, fields)
    parts = [topic_of(sensor_id, "health"), header, b""]
    decode(parts)
    return parts


def _finite_or_none(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def frontend_columns(records: np.ndarray) -> dict:
    """The `records` map of a `frontend` header from per-channel records with the FRONTEND_WIRE_FIELDS
    (a structured array [n_rx]): a list per field, integers as ints, numbers that are not finite as nil."""
    out = {}
    for name, _, dtype in FRONTEND_WIRE_FIELDS:
        column = records[name].tolist()
        out[name] = [int(v) for v in column] if dtype == "<u4" else [_finite_or_none(v) for v in column]
    return out


def encode_frontend(sensor_id: str, seq: int, run: str, timestamp_s: float, records: np.ndarray, full_scale: float,
                    warnings: Sequence[dict] = ()) -> list:
    """The front end's monitor of one frame: `records` one per receive channel (the FRONTEND_WIRE_FIELDS),
    `warnings` maps {rx, cause, value, short, text} (the first FRONTEND_MAX_WARNINGS go on the wire,
    `warnings_total` counts all). Header only; validated here as a receiver would."""
    _check_sensor_id(sensor_id)
    fields = {"seq": int(seq), "run": str(run), "timestamp_s": float(timestamp_s), "full_scale": float(full_scale),
              "records": frontend_columns(records), "warnings": [dict(w) for w in warnings[:FRONTEND_MAX_WARNINGS]],
              "warnings_total": len(warnings)}
    parts = [topic_of(sensor_id, "frontend"), _pack("frontend", sensor_id, fields), b""]
    decode(parts)
    return parts


# ---- decoding ---------------------------------------------------------------------------------

def _as_view(part: Any, index: int) -> memoryview:
    """The part's bytes, as `bytes(part)` would give them: zero-copy for a C-contiguous buffer (what
    ZeroMQ delivers), one copy for a strided one (a slice with a step, a transposed array)."""
    try:
        view = memoryview(part)
    except (TypeError, ValueError, BufferError) as exc:  # no buffer; or one Python cannot export
        what = type(part).__name__
        raise WireError("malformed", f"message part {index} is a {what}, not bytes ({exc})") from None
    if not view.c_contiguous:
        return memoryview(view.tobytes())
    if view.ndim != 1 or view.itemsize != 1:
        view = view.cast("B")
    return view


def _split_topic(topic_v: memoryview) -> tuple[str, str]:
    """(sensor_id, kind) of a topic `<sensor_id>/<kind>`."""
    if topic_v.nbytes > MAX_TOPIC_BYTES:
        raise WireError("oversized", f"topic is {topic_v.nbytes} bytes; at most {MAX_TOPIC_BYTES} allowed")
    try:
        topic = topic_v.tobytes().decode("utf-8")
    except UnicodeDecodeError:
        raise WireError("malformed", f"topic {short(topic_v.tobytes())} is not UTF-8") from None
    sensor_id, sep, kind = topic.rpartition("/")
    if not sep or kind not in KINDS:
        raise WireError("malformed", f"topic {topic!r}: must be '<sensor_id>/<kind>' with kind one of "
                                     f"{', '.join(KINDS)}")
    if not valid_sensor_id(sensor_id):
        raise WireError("malformed", f"topic {topic!r}: the sensor id must be {SENSOR_ID_RULE}")
    return sensor_id, kind


def _check_envelope(header: dict, kind: str, sensor_id: str) -> None:
    """wire, kind and sensor_id: the version first, since another version may define other fields."""
    if "wire" not in header:
        raise WireError("malformed", f"{kind} header field 'wire' is missing")
    wire = header["wire"]
    if type(wire) is not int or wire != WIRE_VERSION:  # 1.0 and True equal 1 in Python, but are no version
        raise WireError("wire_version", f"{kind} header field 'wire' = {short(wire)}: must be the integer "
                                        f"{WIRE_VERSION} (this receiver speaks wire version {WIRE_VERSION} only)")
    for name, want in (("kind", kind), ("sensor_id", sensor_id)):
        if header.get(name) != want:
            raise WireError("malformed", f"{kind} header field '{name}' = {short(header.get(name))}: must equal "
                                         f"the topic's {name.replace('_', ' ')} '{want}'")


def _payload_size(kind: str, payload: memoryview, expected: int, max_payload_bytes: int, what: str) -> None:
    if payload.nbytes > max_payload_bytes:
        raise WireError("oversized", f"{kind} payload is {payload.nbytes} bytes; this receiver accepts at most "
                                     f"{max_payload_bytes}")
    if payload.nbytes != expected:
        raise WireError("shape", f"{kind} payload is {payload.nbytes} bytes; {what} needs {expected}")


def _adc_data(h: AdcHeader, payload: memoryview, max_payload_bytes: int) -> np.ndarray:
    dtype = np.dtype(h.dtype)
    _payload_size("adc", payload, math.prod(h.shape) * dtype.itemsize, max_payload_bytes,
                  f"shape {h.shape} of {h.dtype}")
    actual = zlib.crc32(payload)  # CRC-32 of zlib (ISO 3309 / ITU-T V.42), as in the capture format
    if actual != h.crc32:
        raise WireError("crc", f"adc header field 'crc32' = 0x{h.crc32:08X}: the payload's CRC-32 is 0x{actual:08X}")
    return np.frombuffer(payload, dtype).reshape(h.shape)


def _points_data(h: PointsHeader, payload: memoryview, max_payload_bytes: int) -> np.ndarray:
    if h.fields != _FIELDS_LIST:
        raise WireError("dtype", f"points header field 'fields' = {short(h.fields)}: {FIELDS_RULE}")
    _payload_size("points", payload, h.count * RECORD_DTYPE.itemsize, max_payload_bytes,
                  f"count {h.count} x {RECORD_DTYPE.itemsize}-byte records")
    return np.frombuffer(payload, RECORD_DTYPE) if h.count else np.empty(0, RECORD_DTYPE)


def _rdmap_data(h: RdmapHeader, payload: memoryview, max_payload_bytes: int) -> np.ndarray:
    n_range, n_doppler = h.shape
    if not (0 < n_range <= RDMAP_MAX_RANGE_CELLS and 0 < n_doppler <= RDMAP_MAX_DOPPLER_CELLS):
        raise WireError("shape", f"rdmap header field 'shape' = {h.shape}: must be within "
                                 f"1..{RDMAP_MAX_RANGE_CELLS} x 1..{RDMAP_MAX_DOPPLER_CELLS} cells")
    _payload_size("rdmap", payload, n_range * n_doppler * 4, max_payload_bytes, f"shape {h.shape} of <f4")
    return np.frombuffer(payload, "<f4").reshape(n_range, n_doppler)


def _frontend_data(h: FrontendHeader, payload: memoryview, max_payload_bytes: int) -> np.ndarray:
    """The records as FRONTEND_RECORD_DTYPE [n_rx] (nil as NaN), after the rules between the columns."""
    if payload.nbytes:
        raise WireError("malformed", f"frontend message has a {payload.nbytes}-byte payload; it must be empty")
    columns = {name: getattr(h.records, name) for name, _, _ in FRONTEND_WIRE_FIELDS}
    n = len(columns["samples"])
    for name, column in columns.items():
        if len(column) != n:
            raise WireError("shape", f"frontend header field 'records.{name}' has {len(column)} entries; "
                                     f"'records.samples' has {n}: one per receive channel in each")
    for name in ("clipped_samples", "interference_samples"):
        for rx, (v, total) in enumerate(zip(columns[name], columns["samples"])):
            if v > total:
                raise WireError("malformed", f"frontend header field 'records.{name}' = {v} (rx {rx}): must be at "
                                             f"most that channel's samples ({total})")
    for rx, (bursts, flagged) in enumerate(zip(columns["interference_bursts"], columns["interference_samples"])):
        if bursts > flagged:
            raise WireError("malformed", f"frontend header field 'records.interference_bursts' = {bursts} (rx {rx}): "
                                         f"must be at most that channel's interference_samples ({flagged})")
    for i, w in enumerate(h.warnings):
        if w.rx >= n:
            raise WireError("malformed", f"frontend header field 'warnings[{i}].rx' = {w.rx}: the message has "
                                         f"{n} receive channels (0..{n - 1})")
    if h.warnings_total < len(h.warnings):
        raise WireError("malformed", f"frontend header field 'warnings_total' = {h.warnings_total}: must be at "
                                     f"least the {len(h.warnings)} warnings the message holds")
    data = np.zeros(n, FRONTEND_RECORD_DTYPE)
    for name, column in columns.items():
        data[name] = [math.nan if v is None else v for v in column]
    data.flags.writeable = False
    return data


def _no_payload(kind: str):
    def check(h: Schema, payload: memoryview, max_payload_bytes: int) -> None:
        if payload.nbytes:
            raise WireError("malformed", f"{kind} message has a {payload.nbytes}-byte payload; it must be empty")
    return check


_PAYLOAD_CHECKS = {"adc": _adc_data, "points": _points_data, "rdmap": _rdmap_data,
                   "sensor": _no_payload("sensor"), "health": _no_payload("health"), "frontend": _frontend_data}


def decode(parts: Sequence[Any], *, max_payload_bytes: int = DEFAULT_MAX_PAYLOAD_BYTES) -> Message:
    """Validate one multipart message (bytes, memoryviews or zmq.Frame objects) and return it decoded.
    Raises WireError naming the reason and the field."""
    if not isinstance(parts, (list, tuple)) or len(parts) != 3:
        n = len(parts) if isinstance(parts, (list, tuple)) else type(parts).__name__
        raise WireError("malformed", f"message has {n} parts; the wire has exactly 3 [topic, header, payload]")
    topic_v, header_v, payload = (_as_view(p, i) for i, p in enumerate(parts))
    sensor_id, kind = _split_topic(topic_v)
    limit = MAX_SENSOR_HEADER_BYTES if kind == "sensor" else MAX_HEADER_BYTES
    header = unpack(header_v, kind, limit, WireError)
    _check_envelope(header, kind, sensor_id)
    fields = validate(header, SCHEMAS[kind], kind, WireError)
    data = _PAYLOAD_CHECKS[kind](fields, payload, max_payload_bytes)
    return Message(kind, sensor_id, header, payload, data)


def sensor_from_message(msg: Message) -> Sensor:
    """Parse the sensor description of a `sensor` message and check it against the header."""
    from .sensor import parse_sensor  # here, not at the top: the viewer imports this module, not sensor.py
    if msg.kind != "sensor":
        raise WireError("malformed", f"expected a sensor message, got kind '{msg.kind}'")
    try:
        sensor = parse_sensor(msg.header["sensor_toml"], f"sensor message from '{msg.sensor_id}'")
    except CubecastError as exc:
        raise WireError("malformed", f"sensor header field 'sensor_toml': {exc}") from None
    if sensor.sensor_id != msg.sensor_id:
        raise WireError("unknown_sensor", f"sensor header field 'sensor_toml' describes sensor "
                                          f"'{sensor.sensor_id}', the topic names '{msg.sensor_id}'")
    if sensor.digest != msg.header["digest"]:
        raise WireError("digest", f"sensor header field 'digest' = {msg.header['digest']!r}: the description's "
                                  f"digest is {sensor.digest!r}")
    return sensor

