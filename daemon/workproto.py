"""The worker protocol: serve <-> worker messages, encoded and decoded with bounded, validating
msgpack. Pure: no sockets here (daemon/worker.py and daemon/pool.py own those).

This is an internal protocol, version 1 (`proto` in every header), not the public wire (README "Wire format");
its messages are multipart [kind, header (msgpack map), payload...] decoded with bounded msgpack
(no pickle, no ext types) and validated against the header schemas below, by the same mechanism and
with the same field types as the public wire (daemon/schema.py, daemon/wire.py):

    worker -> serve (DEALER)  hello {worker, name, pid, host, capacity, expect_digest, live_settings}
                              ready {worker, session, digest, warm_up_s, epoch}
                              beat  {worker, session}                     every 0.25 s when idle
                              bye   {worker}                              on a clean exit
                              prepared {worker, session, epoch, error, warm_up_s}  answer to prepare
    serve -> worker (ROUTER)  welcome {session, sensor_toml, digest, settings, range_bias_m,
                                       calibration, epoch, iq_imbalance} + calibration bytes
                                       [+ I/Q table bytes]                 the whole configuration
                              refuse  {reason, message}                   e.g. a sensor digest mismatch
                              who     {session}                           "introduce yourself again"
                              task    {session, task_id, seq, run, timestamp_s, received_unix_s,
                                       digest, dtype, shape, crc32, rdmap, epoch} + the raw ADC payload
                              prepare {session, epoch, settings}          build a chain for these aside
                              commit  {session, epoch}                    switch to it (tasks after it)
                              abort   {session, epoch}                    drop it
    worker -> serve (PUSH)    result  {worker, session, task_id, seq, count, error, stage_ms,
                                       process_s, rdmap, epoch, frontend} + point records + pooled map
                                       (or empty) [+ the front end's records, one per RX channel]

Handshake: a worker sends `hello`; serve answers `welcome` with the sensor description (TOML text,
re-parsed and digest-checked by the worker), the processing settings and the calibration (the
complex64 vector in the third part; with an I/Q table, its float64 (g, phi rad) pairs per RX in a
fourth part, which a cubecast without I/Q correction refuses rather than ignores), so every
worker computes exactly what serve would. A worker started with a sensor description states that
description's digest in its hello; serve refuses a mismatch and the worker exits with an error
naming both. A task carries the ADC payload exactly as received from the source (zero-copy); the
worker checks its digest, dtype, shape, length and CRC-32 before processing.

Settings epochs (live tuning, daemon/retune.py): every configuration serve runs has a number, its
epoch (0 at start-up; each attempted change takes the next number, so a refused change uses one up).
A change is made in two phases. serve sends `prepare` to every ready worker; each builds the new
chain aside (in a thread, processing tasks of the running epoch meanwhile) and answers `prepared`,
with the error if it cannot build it. Only when every worker has answered without an error does
serve `commit`: from then on it numbers tasks with the new epoch, and since the commit travels on the
same connection as the tasks, a worker has processed every task of the old epoch before it switches.
A refusal (or no answer in time) makes serve send `abort` to every worker asked: nobody switches,
and the running epoch goes on. Tasks and results carry their epoch; a result of another epoch than
its task's is refused (counted invalid, the frame lost), so a point cloud is never computed with
settings other than those of the epoch it was dispatched in. A worker welcomed before a commit that
reports ready for the old epoch is sent the new welcome. The epoch fields default to 0, and a hello
without `live_settings` marks a worker that cannot follow a change (an older cubecast): a change is
then refused, naming it.
"""

from __future__ import annotations

import dataclasses
import math
import zlib
from dataclasses import dataclass
from typing import Annotated, Any, Literal, TypeVar

import msgpack
import numpy as np
from msgspec import Meta

from .chain.frontend import FRONTEND_DTYPE
from .chain.points import RECORD_DTYPE
from .errors import CubecastError
from .schema import (Count, Digest, Finite, Flag, NonNegative, Positive, Schema, integer, optional, text,
                     unpack, validate)
from .sensor import Sensor, parse_sensor
from .settings import ProcessingSettings
from .wire import ADC_DTYPES, RDMAP_MAX_DOPPLER_CELLS, RDMAP_MAX_RANGE_CELLS, AdcShape, MapShape

PROTOCOL = 1
MAX_CONTROL_BYTES = 64 * 1024  # headers of every message but `welcome`
MAX_WELCOME_BYTES = 1024 * 1024  # carries the sensor description text (the public wire allows 1 MiB for it)
MAX_ENTRIES = 1024
MAX_CALIBRATION_VALUES = MAX_ENTRIES * 64
MAX_STAGES = 32
MAX_CAPACITY = 8  # tasks one worker may hold, whatever it announces
MAX_NAME_CHARS = 64
MAX_ERROR_CHARS = 2000
HEARTBEAT_S = 0.25


class ProtocolError(CubecastError):
    """A worker-protocol message that breaks the rules above (the message names the field)."""


# ---- header schemas (annotations are module-level names: the string annotations resolve to these) ----

Name = text(MAX_NAME_CHARS)
Host = text(255, 0)
Pid = integer(0, 1 << 32)
Capacity = integer(1, 1 << 16)
OptionalDigest = optional(Digest)
RunId = text(64)
Crc32 = integer(0, 0xFFFFFFFF)
SensorToml = text(MAX_WELCOME_BYTES)
CalibrationCount = integer(1, MAX_CALIBRATION_VALUES)
ResultCount = integer(0, 1 << 24)
ErrorText = optional(text(MAX_ERROR_CHARS, 0))
StageTimes = Annotated[dict[Annotated[str, Meta(max_length=32)], Finite],
                       Meta(max_length=MAX_STAGES, description="must map stage names to finite numbers")]
AnyAdcDtype = Annotated[Literal[ADC_DTYPES], Meta(description=f"must be one of {', '.join(ADC_DTYPES)}")]


class HelloHeader(Schema):
    name: Name
    pid: Pid
    host: Host
    capacity: Capacity  # as announced; serve caps it at MAX_CAPACITY
    expect_digest: OptionalDigest = None
    live_settings: Flag = False  # follows prepare / commit / abort


class CalibrationInfo(Schema):
    dtype: Annotated[Literal["<c8"], Meta(description="must be '<c8'")]
    count: CalibrationCount


OptionalCalibration = Annotated[CalibrationInfo | None, Meta(description="must be nil or {dtype: '<c8', count: n}")]


class IqInfo(Schema):
    dtype: Annotated[Literal["<f8"], Meta(description="must be '<f8'")]
    count: Annotated[int, Meta(ge=1, le=MAX_ENTRIES, description=f"must be an integer in 1..{MAX_ENTRIES}")]


OptionalIq = Annotated[IqInfo | None, Meta(description="must be nil or {dtype: '<f8', count: n_rx}")]


class WelcomeHeader(Schema):
    session: Name
    digest: Digest
    sensor_toml: SensorToml
    range_bias_m: Finite
    calibration: OptionalCalibration = None
    epoch: Count = 0
    iq_imbalance: OptionalIq = None


class TaskHeader(Schema):
    task_id: Count
    seq: Count
    run: RunId
    timestamp_s: Finite
    received_unix_s: Finite
    rdmap: Flag
    digest: Digest
    dtype: AnyAdcDtype
    shape: AdcShape
    crc32: Crc32
    epoch: Count = 0


class MapInfo(Schema):
    """A pooled map's axes: they become the public `rdmap` header's, so they follow its rules."""

    shape: MapShape
    range_start_m: Finite
    range_step_m: Positive
    velocity_start_mps: Finite
    velocity_step_mps: Positive


OptionalMap = Annotated[MapInfo | None, Meta(description="must be nil or a map")]
FrontendCount = optional(integer(1, MAX_ENTRIES))


class ResultHeader(Schema):
    worker: Name
    session: Name
    task_id: Count
    seq: Count
    count: ResultCount
    process_s: NonNegative
    stage_ms: StageTimes
    error: ErrorText = None
    rdmap: OptionalMap = None
    epoch: Count = 0
    frontend: FrontendCount = None  # records in the fifth part (absent from an older worker: no fifth part)


class PrepareHeader(Schema):
    session: Name
    epoch: Count


class PreparedHeader(Schema):
    session: Name
    epoch: Count
    warm_up_s: NonNegative
    error: ErrorText = None


class EpochHeader(Schema):
    """commit and abort."""

    session: Name
    epoch: Count


# ---- encoding and bounded decoding ----------------------------------------------------------------

def _pack(fields: dict) -> bytes:
    header = {"proto": PROTOCOL}
    header.update(fields)
    return msgpack.packb(header, use_bin_type=True)


def _error(reason: str, message: str) -> ProtocolError:
    """The schema module's errors as ours (the worker protocol counts no reasons)."""
    return ProtocolError(message)


def _unpack(part: Any, what: str, limit: int = MAX_CONTROL_BYTES) -> dict:
    """A header map of protocol version PROTOCOL, every msgpack length bounded."""
    header = unpack(part, what, limit, _error)
    proto = header.get("proto")
    if proto != PROTOCOL or isinstance(proto, bool):
        raise ProtocolError(f"{what} header field 'proto' = {proto!r}: this cubecast speaks worker protocol "
                            f"{PROTOCOL} only (run the same cubecast version on serve and workers)")
    return header


H = TypeVar("H", bound=Schema)


def _fields(h: dict, schema: type[H], what: str) -> H:
    return validate(h, schema, what, _error)


def _parts(parts: list, n_min: int, n_max: int, what: str) -> None:
    if not n_min <= len(parts) <= n_max:
        raise ProtocolError(f"{what} message has {len(parts)} parts; expected {n_min}..{n_max}")


# ---- configuration carried in the handshake --------------------------------------------------------

def settings_to_map(settings: ProcessingSettings) -> dict:
    return dataclasses.asdict(settings)


def settings_from_map(values: Any, what: str = "welcome") -> ProcessingSettings:
    """Processing settings from a `welcome` (or `prepare`) header: every field known and of the
    default's type."""
    if not isinstance(values, dict):
        raise ProtocolError(f"{what} header field 'settings' = {values!r}: must be a map")
    fields = {f.name: f for f in dataclasses.fields(ProcessingSettings)}
    out = {}
    for key, value in values.items():
        if key not in fields:
            raise ProtocolError(f"{what} header field 'settings': unknown setting {key!r} (run the same cubecast "
                                "version on serve and workers)")
        kind = type(fields[key].default)
        ok = (isinstance(value, bool) if kind is bool else
              (isinstance(value, int) and not isinstance(value, bool)) if kind is int else
              (isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value))
              if kind is float else isinstance(value, str))
        if not ok:
            raise ProtocolError(f"{what} header field 'settings': {key} = {value!r}: must be a {kind.__name__}")
        out[key] = float(value) if kind is float else value
    try:
        return ProcessingSettings(**out).validate(f"{what} from serve")
    except CubecastError as exc:
        raise ProtocolError(str(exc)) from None


@dataclass(frozen=True)
class WorkerConfig:
    """What a worker needs to compute exactly what serve would (sent in `welcome`)."""

    sensor: Sensor
    settings: ProcessingSettings
    calibration: np.ndarray | None
    range_bias_m: float
    epoch: int = 0  # the settings epoch (live tuning); not part of same_as
    iq_imbalance: np.ndarray | None = None  # float64 [n_rx, 2] = (g, phi rad), or None

    def same_as(self, other: "WorkerConfig | None") -> bool:
        if other is None:
            return False
        return (self.sensor.digest == other.sensor.digest and self.sensor.source_text == other.sensor.source_text
                and self.settings == other.settings and self.range_bias_m == other.range_bias_m
                and _same_array(self.calibration, other.calibration)
                and _same_array(self.iq_imbalance, other.iq_imbalance))


def _same_array(a: np.ndarray | None, b: np.ndarray | None) -> bool:
    return (a is None) == (b is None) and (a is None or (a.shape == b.shape and a.tobytes() == b.tobytes()))


def encode_welcome(session: str, config: WorkerConfig) -> list:
    cal, iq = config.calibration, config.iq_imbalance
    header = _pack({
        "session": session, "sensor_id": config.sensor.sensor_id, "digest": config.sensor.digest,
        "sensor_toml": config.sensor.source_text, "settings": settings_to_map(config.settings),
        "range_bias_m": float(config.range_bias_m),
        "calibration": None if cal is None else {"dtype": "<c8", "count": int(cal.shape[0])},
        "heartbeat_s": HEARTBEAT_S, "epoch": int(config.epoch),
        "iq_imbalance": None if iq is None else {"dtype": "<f8", "count": int(iq.shape[0])}})
    payload = b"" if cal is None else np.ascontiguousarray(cal, "<c8").tobytes()
    if len(header) > MAX_WELCOME_BYTES:
        raise CubecastError(f"the sensor description is too large for a worker welcome ({len(header)} bytes; "
                            f"at most {MAX_WELCOME_BYTES})")
    if iq is None:
        return [b"welcome", header, payload]
    return [b"welcome", header, payload, np.ascontiguousarray(iq, "<f8").tobytes()]


def decode_welcome(parts: list, expect_digest: str | None) -> tuple[str, WorkerConfig]:
    """(session, configuration) from a `welcome`; the description is re-parsed and its digest checked,
    and must match `expect_digest` (the worker's own --sensor) when given."""
    _parts(parts, 3, 4, "welcome")
    h = _unpack(parts[1], "welcome", MAX_WELCOME_BYTES)
    f = _fields(h, WelcomeHeader, "welcome")
    digest = f.digest
    try:
        sensor = parse_sensor(f.sensor_toml, "sensor description from serve")
    except CubecastError as exc:
        raise ProtocolError(f"welcome header field 'sensor_toml': {exc}") from None
    if sensor.digest != digest:
        raise ProtocolError(f"welcome header field 'digest' = {digest!r}: the description serve sent has digest "
                            f"{sensor.digest!r}")
    if h.get("sensor_id") != sensor.sensor_id:
        raise ProtocolError(f"welcome header field 'sensor_id' = {h.get('sensor_id')!r}: the description names "
                            f"{sensor.sensor_id!r}")
    if expect_digest is not None and digest != expect_digest:
        raise CubecastError(f"serve processes sensor '{sensor.sensor_id}' (digest {digest}); this worker was given "
                            f"a description with digest {expect_digest}: start the worker with serve's sensor "
                            "description, or without --sensor")
    settings = settings_from_map(h.get("settings"))
    payload = memoryview(parts[2])
    calibration = None
    if f.calibration is not None:
        count = f.calibration.count
        if count != sensor.n_virtual:
            raise ProtocolError(f"welcome calibration count = {count}: sensor '{sensor.sensor_id}' has "
                                f"{sensor.n_virtual} virtual channels")
        if payload.nbytes != 8 * count:
            raise ProtocolError(f"welcome calibration payload is {payload.nbytes} bytes; {count} complex64 "
                                f"values need {8 * count}")
        calibration = np.frombuffer(payload, "<c8").astype(np.complex64)
        if not np.isfinite(calibration.view(np.float32)).all():
            raise ProtocolError("welcome calibration holds values that are not finite")
    elif payload.nbytes:
        raise ProtocolError(f"welcome without calibration has a {payload.nbytes}-byte payload; it must be empty")
    iq = _welcome_iq(f.iq_imbalance, parts[3] if len(parts) == 4 else None, sensor)
    return f.session, WorkerConfig(sensor, settings, calibration, float(f.range_bias_m), f.epoch, iq)


def _welcome_iq(info: "IqInfo | None", part: Any, sensor: Sensor) -> np.ndarray | None:
    """The I/Q table of a `welcome`: info.count (g, phi rad) float64 pairs in the fourth part, one per RX."""
    from .calibiq import check_iq_table
    if info is None:
        if part is not None:
            raise ProtocolError("welcome with a fourth part but header field 'iq_imbalance' = None; give its count")
        return None
    if info.count != sensor.n_rx:
        raise ProtocolError(f"welcome iq_imbalance count = {info.count}: sensor '{sensor.sensor_id}' has "
                            f"{sensor.n_rx} receive channels")
    view = memoryview(part if part is not None else b"")
    if view.nbytes != 16 * info.count:
        raise ProtocolError(f"welcome I/Q table part is {view.nbytes} bytes; {info.count} (g, phi) float64 pairs "
                            f"need {16 * info.count}")
    try:
        return check_iq_table(np.frombuffer(view, "<f8").reshape(info.count, 2).copy(), sensor.n_rx,
                              "welcome I/Q table")
    except CubecastError as exc:
        raise ProtocolError(str(exc)) from None


@dataclass(frozen=True)
class Task:
    task_id: int
    seq: int
    run: str
    timestamp_s: float
    received_unix_s: float
    want_rdmap: bool
    data: np.ndarray  # the ADC payload (read-only view on the received message)
    raw: bool  # True: the sensor's ADC format; False: canonical complex64
    epoch: int = 0  # the settings epoch it was dispatched in


def encode_task(session: str, task_id: int, header: dict, payload: memoryview, received_unix_s: float,
                want_rdmap: bool, epoch: int = 0) -> list:
    """A task from a validated `adc` message header; the payload goes out without a copy."""
    return [b"task", _pack({
        "session": session, "task_id": int(task_id), "seq": header["seq"], "run": header["run"],
        "timestamp_s": header["timestamp_s"], "received_unix_s": float(received_unix_s),
        "digest": header["digest"], "dtype": header["dtype"], "shape": list(header["shape"]),
        "crc32": header["crc32"], "rdmap": bool(want_rdmap), "epoch": int(epoch)}), payload]


def decode_task(parts: list, sensor: Sensor, session: str, check_crc: bool = True) -> Task:
    """Validate a task against the worker's sensor: session, digest, dtype, shape, length and (unless
    check_crc is False) CRC-32."""
    _parts(parts, 3, 3, "task")
    h = _unpack(parts[1], "task")
    if h.get("session") != session:
        raise ProtocolError(f"task header field 'session' = {h.get('session')!r}: this worker was welcomed by "
                            f"session {session!r}")
    f = _fields(h, TaskHeader, "task")
    if f.digest != sensor.digest:
        raise ProtocolError(f"task header field 'digest' = {f.digest!r}: this worker processes sensor "
                            f"'{sensor.sensor_id}' (digest {sensor.digest})")
    dtype = f.dtype
    raw_dtype = sensor.adc.raw_dtype().str
    if dtype not in (raw_dtype, "<c8"):
        raise ProtocolError(f"task header field 'dtype' = {dtype!r}: sensor '{sensor.sensor_id}' frames are "
                            f"{raw_dtype!r} or canonical '<c8'")
    shape = tuple(f.shape)
    canon = (sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
    expected = sensor.adc.raw_shape(*canon) if dtype == raw_dtype else canon
    if shape != tuple(expected):
        raise ProtocolError(f"task header field 'shape' = {list(shape)}: {dtype} frames of sensor "
                            f"'{sensor.sensor_id}' have shape {list(expected)}")
    crc = f.crc32
    payload = memoryview(parts[2])
    if payload.ndim != 1 or payload.itemsize != 1:
        payload = payload.cast("B")
    need = math.prod(shape) * np.dtype(dtype).itemsize
    if payload.nbytes != need:
        raise ProtocolError(f"task payload is {payload.nbytes} bytes; shape {list(shape)} of {dtype} needs {need}")
    actual = zlib.crc32(payload) if check_crc else crc  # CRC-32 of zlib (ISO 3309 / ITU-T V.42)
    if actual != crc:
        raise ProtocolError(f"task header field 'crc32' = 0x{crc:08X}: the payload's CRC-32 is 0x{actual:08X}")
    data = np.frombuffer(payload, np.dtype(dtype)).reshape(shape)
    return Task(f.task_id, f.seq, f.run, float(f.timestamp_s), float(f.received_unix_s), f.rdmap, data,
                dtype == raw_dtype, f.epoch)


@dataclass
class Result:
    """A worker's answer to one task, decoded and checked by serve."""

    worker: str
    task_id: int
    seq: int
    records: np.ndarray  # RECORD_DTYPE, read-only view on the message
    error: str | None
    stage_ms: dict
    process_s: float
    rdmap: tuple | None  # (values_db float32 [r, d], range_start_m, range_step_m, velocity_start_mps, ..._step_mps)
    epoch: int = 0  # the settings epoch of the chain that computed it
    frontend: np.ndarray | None = None  # FRONTEND_DTYPE [n_rx] (read-only view), None from an older worker


RDMAP_AXES = ("range_start_m", "range_step_m", "velocity_start_mps", "velocity_step_mps")


def encode_result(worker: str, session: str, task_id: int, seq: int, records: np.ndarray | None,
                  error: str | None, stage_ms: dict, process_s: float, rdmap: tuple | None, epoch: int = 0,
                  frontend: np.ndarray | None = None) -> list:
    """frontend: the chain's FRONTEND_DTYPE records of the frame (a fifth part), or None."""
    recs = records if records is not None else np.empty(0, RECORD_DTYPE)
    fields = {"worker": worker, "session": session, "task_id": int(task_id), "seq": int(seq),
              "count": int(recs.shape[0]), "error": None if error is None else str(error)[:MAX_ERROR_CHARS],
              "stage_ms": {k: float(v) for k, v in stage_ms.items()}, "process_s": float(process_s),
              "rdmap": None, "epoch": int(epoch), "frontend": None if frontend is None else int(frontend.shape[0])}
    map_payload: Any = b""
    if rdmap is not None:
        values = np.ascontiguousarray(rdmap[0], "<f4")
        fields["rdmap"] = {"shape": [int(values.shape[0]), int(values.shape[1])],
                           **{k: float(v) for k, v in zip(RDMAP_AXES, rdmap[1:])}}
        map_payload = memoryview(values.reshape(-1).view(np.uint8))
    rec_payload = memoryview(np.ascontiguousarray(recs).view(np.uint8)) if recs.size else b""
    if frontend is None:
        return [b"result", _pack(fields), rec_payload, map_payload]
    return [b"result", _pack(fields), rec_payload, map_payload,
            np.ascontiguousarray(frontend, FRONTEND_DTYPE).tobytes()]


def decode_result(parts: list) -> tuple[str, str, Result]:
    """(worker key, session, result), every field checked; records must carry the task's seq."""
    _parts(parts, 4, 5, "result")
    if bytes(parts[0]) != b"result":
        raise ProtocolError(f"message kind {bytes(parts[0])[:16]!r} on the results socket; expected b'result'")
    h = _unpack(parts[1], "result")
    f = _fields(h, ResultHeader, "result")
    count, seq = f.count, f.seq
    rec_view = memoryview(parts[2])
    if rec_view.nbytes != count * RECORD_DTYPE.itemsize:
        raise ProtocolError(f"result payload is {rec_view.nbytes} bytes; count {count} x "
                            f"{RECORD_DTYPE.itemsize}-byte records needs {count * RECORD_DTYPE.itemsize}")
    records = np.frombuffer(rec_view, RECORD_DTYPE) if count else np.empty(0, RECORD_DTYPE)
    if count and not (records["frame"] == seq).all():
        raise ProtocolError(f"result records carry frame numbers other than the task's seq {seq}")
    rd = f.rdmap
    rdmap = None
    map_view = memoryview(parts[3])
    if rd is not None:
        shape = tuple(rd.shape)
        if not (0 < shape[0] <= RDMAP_MAX_RANGE_CELLS and 0 < shape[1] <= RDMAP_MAX_DOPPLER_CELLS):
            raise ProtocolError(f"result rdmap shape {list(shape)}: at most {RDMAP_MAX_RANGE_CELLS} x "
                                f"{RDMAP_MAX_DOPPLER_CELLS} cells")
        axes = [float(getattr(rd, k)) for k in RDMAP_AXES]
        if map_view.nbytes != shape[0] * shape[1] * 4:
            raise ProtocolError(f"result rdmap payload is {map_view.nbytes} bytes; shape {list(shape)} of <f4 "
                                f"needs {shape[0] * shape[1] * 4}")
        rdmap = (np.frombuffer(map_view, "<f4").reshape(shape), *axes)
    elif map_view.nbytes:
        raise ProtocolError("result without rdmap has a map payload; it must be empty")
    frontend = _result_frontend(f.frontend, parts[4] if len(parts) == 5 else None)
    return f.worker, f.session, Result(f.worker, f.task_id, seq, records, f.error,
                                       {k: float(v) for k, v in f.stage_ms.items()}, float(f.process_s), rdmap,
                                       f.epoch, frontend)


def _result_frontend(count: int | None, part: Any) -> np.ndarray | None:
    """The front end's records of a result: `count` FRONTEND_DTYPE records in the fifth part."""
    if count is None:
        if part is not None:
            raise ProtocolError("result with a fifth part but header field 'frontend' = None; give the count")
        return None
    view = memoryview(part if part is not None else b"")
    need = count * FRONTEND_DTYPE.itemsize
    if view.nbytes != need:
        raise ProtocolError(f"result front-end part is {view.nbytes} bytes; header field 'frontend' = {count} "
                            f"records of {FRONTEND_DTYPE.itemsize} bytes needs {need}")
    return np.frombuffer(view, FRONTEND_DTYPE)


# ---- control messages: hello, ready, beat, bye (worker -> serve); refuse, who (serve -> worker) ------

@dataclass(frozen=True)
class Hello:
    name: str
    pid: int
    host: str
    capacity: int  # as announced; serve caps it at MAX_CAPACITY
    expect_digest: str | None
    live_settings: bool = False


def encode_hello(worker: str, name: str, pid: int, host: str, capacity: int, expect_digest: str | None) -> list:
    return [b"hello", _pack({"worker": worker, "name": name, "pid": pid, "host": host, "capacity": capacity,
                             "expect_digest": expect_digest, "live_settings": True})]


def decode_control(key: bytes, kind: bytes, part: Any) -> dict:
    """The header of a control message a worker sent (hello, ready, beat, bye), checked to name the
    sender's address in its 'worker' field."""
    h = _unpack(part, kind.decode("ascii", "replace")[:16] or "control")
    if h.get("worker") != key.decode("ascii", "replace"):
        raise ProtocolError(f"header field 'worker' = {h.get('worker')!r:.40} differs from the sender's "
                            "address")
    return h


def decode_hello(h: dict) -> Hello:
    f = _fields(h, HelloHeader, "hello")
    return Hello(f.name, f.pid, f.host, f.capacity, f.expect_digest, f.live_settings)


def encode_ready(worker: str, session: str, digest: str, warm_up_s: float, epoch: int = 0) -> list:
    return [b"ready", _pack({"worker": worker, "session": session, "digest": digest, "warm_up_s": warm_up_s,
                             "epoch": int(epoch)})]


def encode_beat(worker: str, session: str) -> list:
    return [b"beat", _pack({"worker": worker, "session": session})]


def encode_bye(worker: str) -> list:
    return [b"bye", _pack({"worker": worker})]


def encode_who(session: str) -> list:
    return [b"who", _pack({"session": session})]


def encode_refuse(reason: str, message: str) -> list:
    return [b"refuse", _pack({"reason": reason, "message": message})]


def decode_refuse(parts: list) -> str:
    """The reason text of a `refuse` (at most 500 characters; 'no reason given' without one)."""
    h = _unpack(parts[1], "refuse") if len(parts) > 1 else {}
    msg = h.get("message") if isinstance(h.get("message"), str) else "no reason given"
    return msg[:500]


def task_ids(parts: list) -> tuple[Any, Any, Any]:
    """(session, task_id, seq) of a task as far as its header can be read, unchecked: a worker answers
    a task it cannot decode with an error result for that task id."""
    h = _unpack(parts[1], "task") if len(parts) > 1 else {}
    return h.get("session"), h.get("task_id"), h.get("seq")


# ---- live settings changes: prepare, commit, abort (serve -> worker); prepared (worker -> serve) -----

def encode_prepare(session: str, epoch: int, settings: ProcessingSettings) -> list:
    return [b"prepare", _pack({"session": session, "epoch": int(epoch), "settings": settings_to_map(settings)})]


def decode_prepare(parts: list, session: str | None) -> tuple[int, ProcessingSettings]:
    """(epoch, settings) of a `prepare` for this worker's session."""
    _parts(parts, 2, 2, "prepare")
    h = _unpack(parts[1], "prepare")
    f = _fields(h, PrepareHeader, "prepare")
    if f.session != session:
        raise ProtocolError(f"prepare header field 'session' = {f.session!r}: this worker was welcomed by "
                            f"session {session!r}")
    return f.epoch, settings_from_map(h.get("settings"), "prepare")


def encode_prepared(worker: str, session: str, epoch: int, error: str | None, warm_up_s: float) -> list:
    return [b"prepared", _pack({"worker": worker, "session": session, "epoch": int(epoch),
                                "error": None if error is None else str(error)[:MAX_ERROR_CHARS],
                                "warm_up_s": float(warm_up_s)})]


def decode_prepared(h: dict) -> PreparedHeader:
    """A `prepared` header (from decode_control)."""
    return _fields(h, PreparedHeader, "prepared")


def encode_commit(session: str, epoch: int) -> list:
    return [b"commit", _pack({"session": session, "epoch": int(epoch)})]


def encode_abort(session: str, epoch: int) -> list:
    return [b"abort", _pack({"session": session, "epoch": int(epoch)})]


def decode_epoch(parts: list, kind: str, session: str | None) -> int:
    """The epoch of a `commit` or `abort` for this worker's session."""
    _parts(parts, 2, 2, kind)
    f = _fields(_unpack(parts[1], kind), EpochHeader, kind)
    if f.session != session:
        raise ProtocolError(f"{kind} header field 'session' = {f.session!r}: this worker was welcomed by "
                            f"session {session!r}")
    return f.epoch
