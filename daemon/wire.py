"""cubecast wire format, version 1: encode and decode every message kind (pure functions, no sockets).

The contract is /work/notes/wire.md (README "Wire format"). Every message is three parts:

    [ topic b"<sensor_id>/<kind>" , header (msgpack map, string keys) , payload (raw bytes, may be empty) ]

Encoders return the three parts as a list (the payload a zero-copy memoryview of the array passed in;
the caller must not modify that array afterwards, since ZeroMQ may still be sending it). `decode`
validates everything before any value is used: sizes first (topic, header, payload), then msgpack
with bounded lengths (no pickle, no eval, no ext types), then every header field's type and range,
then the payload against the header (length, CRC-32). A failure raises WireError, a CubecastError
with `reason` (one of REASONS) and a message naming the field, its value and the rule.

Header keys a kind does not define are ignored (forward compatibility within version 1).
"""

from __future__ import annotations

import math
import re
import zlib
from dataclasses import dataclass
from typing import Any, Iterable, Sequence

import msgpack
import numpy as np

from .chain.points import FRAME_FIELDS, POINT_FIELDS, RECORD_DTYPE
from .errors import CubecastError
from .sensor import Sensor, parse_sensor

WIRE_VERSION = 1
KINDS = ("adc", "points", "rdmap", "sensor", "health")
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
MAX_FIELD_ENTRIES = 1024  # msgpack array and map lengths
RDMAP_MAX_RANGE_CELLS = 128
RDMAP_MAX_DOPPLER_CELLS = 64

# [name, unit, dtype] of each record field, in order: exactly RECORD_DTYPE (64 bytes, no padding)
POINT_WIRE_FIELDS: tuple[tuple[str, str, str], ...] = tuple(FRAME_FIELDS) + tuple(
    (name, unit, "<f4") for name, unit in POINT_FIELDS)
assert RECORD_DTYPE.itemsize == 64 and tuple(f[0] for f in POINT_WIRE_FIELDS) == RECORD_DTYPE.names

SENSOR_SUMMARY_KEYS = ("max_range_m", "max_velocity_mps", "fov_half_azimuth_deg", "fov_half_elevation_deg",
                       "range_resolution_m", "velocity_resolution_mps")
HEALTH_INT_FIELDS = ("frames_received", "frames_processed", "frames_dropped", "frames_rejected",
                     "sequence_gaps", "source_restarts", "queue_depth", "points_last")
HEALTH_FLOAT_FIELDS = ("uptime_s", "cpu_share", "fps")
HEALTH_OPTIONAL_FLOAT_FIELDS = ("latency_p50_ms", "latency_p99_ms")  # nil when no frame in the interval

_DIGEST_RE = re.compile(r"[0-9a-f]{16}")


class WireError(CubecastError):
    """A message that breaks the wire contract; `reason` is one of REASONS."""

    def __init__(self, reason: str, message: str):
        assert reason in REASONS, reason
        super().__init__(message)
        self.reason = reason


@dataclass(frozen=True)
class Message:
    """A decoded, validated message. `data` is a read-only numpy view on the payload: the ADC frame
    (header dtype and shape) for `adc`, RECORD_DTYPE records for `points`, float32 [range, doppler]
    for `rdmap`, None for `sensor` and `health`."""

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
    if not isinstance(sensor_id, str) or not 0 < len(sensor_id) <= MAX_SENSOR_ID_CHARS or "/" in sensor_id:
        raise WireError("malformed", f"sensor_id {sensor_id!r}: must be 1..{MAX_SENSOR_ID_CHARS} characters "
                                     "without '/'")


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
    """A display map: float32 dB [n_range, n_doppler], at most 128 x 64 cells."""
    _check_sensor_id(sensor_id)
    arr = np.ascontiguousarray(values_db, dtype="<f4")
    if arr.ndim != 2 or not (0 < arr.shape[0] <= RDMAP_MAX_RANGE_CELLS and 0 < arr.shape[1] <= RDMAP_MAX_DOPPLER_CELLS):
        raise WireError("shape", f"rdmap shape {list(arr.shape)}: must be [n_range, n_doppler] with "
                                 f"1..{RDMAP_MAX_RANGE_CELLS} x 1..{RDMAP_MAX_DOPPLER_CELLS} cells")
    header = _pack("rdmap", sensor_id, {
        "seq": int(seq), "timestamp_s": float(timestamp_s), "shape": [int(arr.shape[0]), int(arr.shape[1])],
        "dtype": "<f4", "range_start_m": float(range_start_m), "range_step_m": float(range_step_m),
        "velocity_start_mps": float(velocity_start_mps), "velocity_step_mps": float(velocity_step_mps),
        "unit": "dB"})
    return [topic_of(sensor_id, "rdmap"), header, _array_view(arr)]


def sensor_summary(sensor: Sensor, velocity_unfolding: bool = True) -> dict:
    return {
        "max_range_m": float(sensor.max_range_m),
        "max_velocity_mps": float(sensor.max_velocity_unfolded_mps if velocity_unfolding and sensor.n_slots > 1
                                  else sensor.max_velocity_mps),
        "fov_half_azimuth_deg": float(sensor.fov_half_azimuth_deg),
        "fov_half_elevation_deg": float(sensor.fov_half_elevation_deg),
        "range_resolution_m": float(sensor.range_resolution_m),
        "velocity_resolution_mps": float(sensor.velocity_resolution_mps),
    } | ({} if sensor.mount_height_m is None else {"mount_height_m": float(sensor.mount_height_m)})


def encode_sensor(sensor: Sensor, velocity_unfolding: bool = True) -> list:
    _check_sensor_id(sensor.sensor_id)
    header = _pack("sensor", sensor.sensor_id, {
        "digest": sensor.digest, "sensor_toml": sensor.source_text,
        "summary": sensor_summary(sensor, velocity_unfolding)})
    return [topic_of(sensor.sensor_id, "sensor"), header, b""]


def encode_health(sensor_id: str, fields: dict) -> list:
    """`fields`: the health map of wire.md (validated here as a receiver would, so a bug cannot put
    an invalid message on the bus)."""
    _check_sensor_id(sensor_id)
    header = _pack("health", sensor_id, fields)
    parts = [topic_of(sensor_id, "health"), header, b""]
    decode(parts)
    return parts


# ---- decoding ---------------------------------------------------------------------------------

def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _bad(kind: str, name: str, value: Any, rule: str, reason: str = "malformed") -> WireError:
    return WireError(reason, f"{kind} header field '{name}' = {_short(value)}: {rule}")


def _get(h: dict, kind: str, name: str) -> Any:
    if name not in h:
        raise WireError("malformed", f"{kind} header field '{name}' is missing")
    return h[name]


def _int(h: dict, kind: str, name: str, lo: int = 0, hi: int = (1 << 64) - 1) -> int:
    v = _get(h, kind, name)
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        raise _bad(kind, name, v, f"must be an integer in {lo}..{hi}")
    return v


def _float(h: dict, kind: str, name: str, lo: float = -math.inf, optional: bool = False) -> float | None:
    v = _get(h, kind, name)
    if v is None and optional:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < lo:
        rule = "must be a finite number" + (f" >= {lo:g}" if lo > -math.inf else "")
        raise _bad(kind, name, v, rule + (" or nil" if optional else ""))
    return float(v)


def _str(h: dict, kind: str, name: str, max_chars: int, min_chars: int = 1) -> str:
    v = _get(h, kind, name)
    if not isinstance(v, str) or not min_chars <= len(v) <= max_chars:
        raise _bad(kind, name, v, f"must be a string of {min_chars}..{max_chars} characters")
    return v


def _digest(h: dict, kind: str) -> str:
    v = _get(h, kind, "digest")
    if not isinstance(v, str) or not _DIGEST_RE.fullmatch(v):
        raise _bad(kind, "digest", v, "must be 16 lowercase hex characters (Sensor.digest)")
    return v


def _shape(h: dict, kind: str, ndim_lo: int = 1, ndim_hi: int = MAX_NDIM) -> tuple[int, ...]:
    v = _get(h, kind, "shape")
    if (not isinstance(v, list) or not ndim_lo <= len(v) <= ndim_hi
            or any(isinstance(d, bool) or not isinstance(d, int) or not 0 <= d < MAX_DIM for d in v)):
        raise _bad(kind, "shape", v, f"must be a list of {ndim_lo}..{ndim_hi} integers in 0..{MAX_DIM - 1}")
    return tuple(v)


def _empty_payload(kind: str, payload: memoryview) -> None:
    if payload.nbytes:
        raise WireError("malformed", f"{kind} message has a {payload.nbytes}-byte payload; it must be empty")


def _payload_size(kind: str, payload: memoryview, expected: int, max_payload_bytes: int, what: str) -> None:
    if payload.nbytes > max_payload_bytes:
        raise WireError("oversized", f"{kind} payload is {payload.nbytes} bytes; this receiver accepts at most "
                                     f"{max_payload_bytes}")
    if payload.nbytes != expected:
        raise WireError("shape", f"{kind} payload is {payload.nbytes} bytes; {what} needs {expected}")


def _as_view(part: Any, index: int) -> memoryview:
    try:
        view = memoryview(part)
    except TypeError:
        raise WireError("malformed", f"message part {index} is a {type(part).__name__}, not bytes") from None
    if view.ndim != 1 or view.itemsize != 1:
        view = view.cast("B")
    return view


def decode(parts: Sequence[Any], *, max_payload_bytes: int = DEFAULT_MAX_PAYLOAD_BYTES) -> Message:
    """Validate one multipart message (bytes, memoryviews or zmq.Frame objects) and return it decoded.
    Raises WireError naming the reason and the field."""
    if not isinstance(parts, (list, tuple)) or len(parts) != 3:
        n = len(parts) if isinstance(parts, (list, tuple)) else type(parts).__name__
        raise WireError("malformed", f"message has {n} parts; the wire has exactly 3 [topic, header, payload]")
    topic_v, header_v, payload = (_as_view(p, i) for i, p in enumerate(parts))

    if topic_v.nbytes > MAX_TOPIC_BYTES:
        raise WireError("oversized", f"topic is {topic_v.nbytes} bytes; at most {MAX_TOPIC_BYTES} allowed")
    try:
        topic = topic_v.tobytes().decode("utf-8")
    except UnicodeDecodeError:
        raise WireError("malformed", f"topic {_short(topic_v.tobytes())} is not UTF-8") from None
    sensor_id, sep, kind = topic.rpartition("/")
    if not sep or kind not in KINDS or not sensor_id or "/" in sensor_id or len(sensor_id) > MAX_SENSOR_ID_CHARS:
        raise WireError("malformed", f"topic {topic!r}: must be '<sensor_id>/<kind>' with kind one of "
                                     f"{', '.join(KINDS)}")

    limit = MAX_SENSOR_HEADER_BYTES if kind == "sensor" else MAX_HEADER_BYTES
    if header_v.nbytes > limit:
        raise WireError("oversized", f"{kind} header is {header_v.nbytes} bytes; at most {limit} allowed")
    try:
        header = msgpack.unpackb(header_v, raw=False, use_list=True, strict_map_key=True,
                                 max_str_len=limit, max_bin_len=limit, max_array_len=MAX_FIELD_ENTRIES,
                                 max_map_len=MAX_FIELD_ENTRIES, max_ext_len=0)
    except ValueError as exc:
        if "max_ext_len" in str(exc):
            raise WireError("malformed", f"{kind} header holds a msgpack ext type; the wire allows none") from None
        if "exceeds max" in str(exc):
            raise WireError("oversized", f"{kind} header: {exc}") from None
        raise WireError("malformed", f"{kind} header is not one valid msgpack value ({type(exc).__name__}"
                                     f"{': ' + str(exc) if str(exc) else ''})") from None
    except Exception as exc:  # msgpack's FormatError, StackError and friends
        raise WireError("malformed", f"{kind} header is not valid msgpack ({type(exc).__name__})") from None
    if not isinstance(header, dict):
        raise WireError("malformed", f"{kind} header is a msgpack {type(header).__name__}, not a map")

    wire = _get(header, kind, "wire")
    if wire != WIRE_VERSION or isinstance(wire, bool):
        raise WireError("wire_version", f"{kind} header field 'wire' = {_short(wire)}: this receiver speaks "
                                        f"wire version {WIRE_VERSION} only")
    if header.get("kind") != kind:
        raise _bad(kind, "kind", header.get("kind"), f"must equal the topic's kind '{kind}'")
    if header.get("sensor_id") != sensor_id:
        raise _bad(kind, "sensor_id", header.get("sensor_id"), f"must equal the topic's sensor id '{sensor_id}'")

    data = None
    if kind == "adc":
        _int(header, kind, "seq")
        _str(header, kind, "run", MAX_RUN_CHARS)
        _float(header, kind, "timestamp_s")
        _digest(header, kind)
        dtype = _get(header, kind, "dtype")
        if dtype not in ADC_DTYPES or not isinstance(dtype, str):
            raise _bad(kind, "dtype", dtype, f"must be one of {', '.join(ADC_DTYPES)}", "dtype")
        shape = _shape(header, kind)
        crc = _int(header, kind, "crc32", 0, 0xFFFFFFFF)
        itemsize = np.dtype(dtype).itemsize
        _payload_size(kind, payload, math.prod(shape) * itemsize, max_payload_bytes, f"shape {list(shape)} of {dtype}")
        # CRC-32 of zlib (ISO 3309 / ITU-T V.42), as in the capture format
        actual = zlib.crc32(payload)
        if actual != crc:
            raise WireError("crc", f"adc header field 'crc32' = 0x{crc:08X}: the payload's CRC-32 is 0x{actual:08X}")
        data = np.frombuffer(payload, np.dtype(dtype)).reshape(shape)
    elif kind == "points":
        _int(header, kind, "seq")
        _str(header, kind, "run", MAX_RUN_CHARS)
        _float(header, kind, "timestamp_s")
        _float(header, kind, "latency_s", 0.0)
        count = _int(header, kind, "count", 0, MAX_DIM)
        fields = _get(header, kind, "fields")
        if fields != [list(f) for f in POINT_WIRE_FIELDS]:
            raise _bad(kind, "fields", fields, "must be exactly the record layout of wire.md (64-byte records, "
                                               "frame <u8, timestamp_s <f8, then 12 <f4 fields)", "dtype")
        _payload_size(kind, payload, count * RECORD_DTYPE.itemsize, max_payload_bytes,
                      f"count {count} x {RECORD_DTYPE.itemsize}-byte records")
        data = np.frombuffer(payload, RECORD_DTYPE) if count else np.empty(0, RECORD_DTYPE)
    elif kind == "rdmap":
        _int(header, kind, "seq")
        _float(header, kind, "timestamp_s")
        shape = _shape(header, kind, 2, 2)
        if not (0 < shape[0] <= RDMAP_MAX_RANGE_CELLS and 0 < shape[1] <= RDMAP_MAX_DOPPLER_CELLS):
            raise _bad(kind, "shape", list(shape), f"must be within 1..{RDMAP_MAX_RANGE_CELLS} x "
                                                   f"1..{RDMAP_MAX_DOPPLER_CELLS} cells", "shape")
        if _get(header, kind, "dtype") != "<f4":
            raise _bad(kind, "dtype", header["dtype"], "must be '<f4'", "dtype")
        for name in ("range_start_m", "range_step_m", "velocity_start_mps", "velocity_step_mps"):
            _float(header, kind, name)
        if _get(header, kind, "unit") != "dB":
            raise _bad(kind, "unit", header["unit"], "must be 'dB'")
        _payload_size(kind, payload, shape[0] * shape[1] * 4, max_payload_bytes, f"shape {list(shape)} of <f4")
        data = np.frombuffer(payload, "<f4").reshape(shape)
    elif kind == "sensor":
        _digest(header, kind)
        _str(header, kind, "sensor_toml", MAX_SENSOR_HEADER_BYTES)
        summary = _get(header, kind, "summary")
        if not isinstance(summary, dict):
            raise _bad(kind, "summary", summary, "must be a map")
        for name in SENSOR_SUMMARY_KEYS:
            _float(summary, "sensor summary", name)
        _empty_payload(kind, payload)
    else:  # health
        for name in HEALTH_INT_FIELDS:
            _int(header, kind, name)
        for name in HEALTH_FLOAT_FIELDS:
            _float(header, kind, name, 0.0)
        for name in HEALTH_OPTIONAL_FLOAT_FIELDS:
            _float(header, kind, name, 0.0, optional=True)
        rejected = _get(header, kind, "rejected")
        if (not isinstance(rejected, dict) or any(k not in REASONS for k in rejected)
                or any(isinstance(v, bool) or not isinstance(v, int) or v < 0 for v in rejected.values())):
            raise _bad(kind, "rejected", rejected, f"must map reasons ({', '.join(REASONS)}) to counts >= 0")
        _empty_payload(kind, payload)
    return Message(kind, sensor_id, header, payload, data)


def sensor_from_message(msg: Message) -> Sensor:
    """Parse the sensor description of a `sensor` message and check it against the header."""
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


def parts_nbytes(parts: Iterable[Any]) -> int:
    return sum(memoryview(p).nbytes for p in parts)
