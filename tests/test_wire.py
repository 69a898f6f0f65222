"""Wire format: every kind round-trips, every rejection reason is raised with a message naming the field.
Pure functions, no sockets."""

from __future__ import annotations

import json
import zlib

import msgpack
import numpy as np
import pytest

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.chain.points import POINT_DTYPE, RECORD_DTYPE, to_records
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.sensor import load_sensor
from cubecast.daemon import wire
from cubecast.daemon.sensor import parse_sensor
from cubecast.daemon.wire import (MAX_HEADER_BYTES, POINT_WIRE_FIELDS, REASONS, WireError, decode, encode_adc,
                                  encode_health, encode_points, encode_rdmap, encode_sensor, sensor_from_message)
from tests.helpers import SAMPLES, YARD_SENSOR, sensor_text


@pytest.fixture(scope="module")
def sensor():
    return load_sensor(YARD_SENSOR)


@pytest.fixture(scope="module")
def yard_frame():
    with CaptureReader(SAMPLES / "yard.cap") as r:
        return r.read(3).payload


def raw(topic: str, header: dict, payload: bytes = b"") -> list:
    return [topic.encode(), msgpack.packb(header, use_bin_type=True), payload]


def adc_header(sensor, payload: np.ndarray, **over) -> dict:
    h = {"wire": 3, "kind": "adc", "sensor_id": sensor.sensor_id, "seq": 5, "run": "abc", "timestamp_s": 0.5,
         "dtype": payload.dtype.str, "shape": list(payload.shape), "digest": sensor.digest,
         "crc32": zlib.crc32(payload.tobytes())}
    h.update(over)
    return h


def rejected(parts, reason: str, *words: str, **kw) -> WireError:
    with pytest.raises(WireError) as info:
        decode(parts, **kw)
    err = info.value
    assert err.reason == reason, f"{err.reason}: {err}"
    assert isinstance(err, CubecastError)
    for w in words:
        assert w in str(err), f"{w!r} not named in: {err}"
    return err


# ---- round trips -----------------------------------------------------------------------------------

def test_crc_is_the_common_crc32():
    # CRC-32 (ISO 3309 / ITU-T V.42, zlib): check value of b"123456789" is 0xCBF43926
    # (Williams, "A painless guide to CRC error detection algorithms", 1993, catalogue entry CRC-32)
    assert zlib.crc32(b"123456789") == 0xCBF43926
    payload = np.frombuffer(b"12345678", "<i2")
    msg = decode(encode_adc("s-1", 0, "r", 0.0, payload, "0123456789abcdef"))
    assert msg.header["crc32"] == zlib.crc32(b"12345678")


def test_adc_round_trip_int16_and_canonical(sensor, yard_frame):
    parts = encode_adc(sensor.sensor_id, 7, "run-1", 0.7, yard_frame, sensor.digest)
    assert bytes(parts[0]) == b"yard-a/adc" and len(parts) == 3
    msg = decode(parts)
    assert (msg.kind, msg.sensor_id, msg.seq, msg.run, msg.timestamp_s) == ("adc", "yard-a", 7, "run-1", 0.7)
    assert msg.header["dtype"] == "<i2" and msg.header["shape"] == [96, 4, 128, 2]
    assert msg.data.dtype == np.dtype("<i2") and np.array_equal(msg.data, yard_frame)
    canon = (yard_frame[..., 0] + 1j * yard_frame[..., 1]).astype(np.complex64)
    msg = decode(encode_adc(sensor.sensor_id, 8, "run-1", 0.8, canon, sensor.digest))
    assert msg.header["dtype"] == "<c8" and np.array_equal(msg.data, canon)


def test_adc_payload_is_not_copied(sensor, yard_frame):
    frame = yard_frame.copy()
    parts = encode_adc(sensor.sensor_id, 0, "r", 0.0, frame, sensor.digest)
    frame[0, 0, 0, 0] += 1  # the memoryview sees the change: zero-copy (so callers must hand fresh arrays)
    assert np.frombuffer(parts[2], "<i2")[0] == frame[0, 0, 0, 0]


def test_points_round_trip_is_byte_exact():
    rng = np.random.default_rng(1)
    pts = np.zeros(5, POINT_DTYPE)
    for name in POINT_DTYPE.names:
        pts[name] = rng.standard_normal(5)
    rec = to_records(pts, 12, 1.25)
    msg = decode(encode_points("yard-a", 12, "r9", 1.25, 0.004, rec))
    assert msg.header["count"] == 5 and msg.header["latency_s"] == 0.004
    assert msg.header["fields"] == [list(f) for f in POINT_WIRE_FIELDS]
    assert msg.data.dtype == RECORD_DTYPE and msg.data.tobytes() == rec.tobytes()
    # the record layout of README "Wire format": 8 + 8 + 16 * 4 = 80 bytes, no padding
    assert RECORD_DTYPE.itemsize == 80 and len(POINT_WIRE_FIELDS) == 18
    empty = decode(encode_points("yard-a", 13, "r9", 1.35, 0.001, np.empty(0, RECORD_DTYPE)))
    assert empty.header["count"] == 0 and empty.data.shape == (0,) and empty.payload.nbytes == 0


def test_rdmap_round_trip():
    values = np.arange(12, dtype=np.float32).reshape(3, 4)
    msg = decode(encode_rdmap("yard-a", 3, 0.3, values, 0.0, 0.2, -1.0, 0.5))
    assert np.array_equal(msg.data, values) and msg.header["shape"] == [3, 4] and msg.header["unit"] == "dB"
    with pytest.raises(WireError) as info:
        encode_rdmap("yard-a", 3, 0.3, np.zeros((129, 4), np.float32), 0.0, 0.2, -1.0, 0.5)
    assert info.value.reason == "shape"


def test_sensor_round_trip(sensor):
    msg = decode(encode_sensor(sensor))
    assert msg.header["digest"] == sensor.digest
    back = sensor_from_message(msg)
    assert back.digest == sensor.digest and back.sensor_id == "yard-a"
    s = msg.header["summary"]
    assert s["max_range_m"] == pytest.approx(sensor.max_range_m)
    assert s["max_velocity_mps"] == pytest.approx(sensor.max_velocity_unfolded_mps)
    assert s["range_resolution_m"] == pytest.approx(sensor.range_resolution_m)
    # forged description: the digest must match the text
    forged = msg.header | {"digest": "0" * 16}
    with pytest.raises(WireError) as info:
        sensor_from_message(decode(raw("yard-a/sensor", forged)))
    assert info.value.reason == "digest" and "'digest'" in str(info.value)


def health_fields(**over) -> dict:
    h = {"uptime_s": 1.0, "frames_received": 10, "frames_processed": 8, "frames_dropped": 1, "frames_rejected": 1,
         "rejected": {"crc": 1}, "sequence_gaps": 0, "source_restarts": 0, "latency_p50_ms": 3.0,
         "latency_p99_ms": None, "queue_depth": 0, "cpu_share": 0.1, "points_last": 4, "fps": 9.5}
    h.update(over)
    return h


def test_health_round_trip_and_encoder_validates():
    msg = decode(encode_health("yard-a", health_fields()))
    assert msg.header["rejected"] == {"crc": 1} and msg.header["latency_p99_ms"] is None
    with pytest.raises(WireError) as info:
        encode_health("yard-a", health_fields(frames_dropped=-1))
    assert "frames_dropped" in str(info.value)
    with pytest.raises(WireError) as info:
        encode_health("yard-a", health_fields(rejected={"nonsense": 1}))
    assert "rejected" in str(info.value)


# ---- every rejection reason ------------------------------------------------------------------------

def test_malformed_structure(sensor, yard_frame):
    good = encode_adc(sensor.sensor_id, 0, "r", 0.0, yard_frame, sensor.digest)
    rejected(good[:2], "malformed", "exactly 3")
    rejected(good + [b""], "malformed", "exactly 3")
    rejected([b"\xff\xfe/adc", good[1], good[2]], "malformed", "UTF-8")
    rejected([b"yard-a-adc", good[1], good[2]], "malformed", "topic")
    rejected([b"yard-a/video", good[1], good[2]], "malformed", "topic")
    rejected([b"yard-a/adc", b"\xc1", good[2]], "malformed", "msgpack")
    rejected([b"yard-a/adc", msgpack.packb([1, 2]), good[2]], "malformed", "not a map")
    rejected([b"yard-a/adc", msgpack.packb({"wire": 3}) + b"\x00", good[2]], "malformed", "msgpack")
    rejected([b"yard-a/adc", msgpack.packb({1: 2}), good[2]], "malformed", "msgpack")
    # ext types (and with them any object hook) are refused: nothing is ever unpickled or evaluated
    rejected([b"yard-a/adc", msgpack.packb({"wire": msgpack.ExtType(5, b"x")}), good[2]], "malformed", "msgpack")
    # also an empty one, and also under a key the kind does not define
    rejected([b"yard-a/adc", msgpack.packb({"note": msgpack.ExtType(5, b"")}), good[2]], "malformed", "ext type")
    # nesting deeper than the unpacker's stack
    rejected([b"yard-a/adc", b"\x91" * 5000 + b"\x00", good[2]], "malformed")
    rejected([object(), good[1], good[2]], "malformed", "part 0")


def test_malformed_fields(sensor, yard_frame):
    p = yard_frame.tobytes()
    for field, value, word in [("seq", -1, "'seq'"), ("seq", True, "'seq'"), ("seq", 1.5, "'seq'"),
                               ("run", "", "'run'"), ("run", 7, "'run'"), ("timestamp_s", float("nan"), "'timestamp_s'"),
                               ("timestamp_s", "0", "'timestamp_s'"), ("digest", "XYZ", "'digest'"),
                               ("shape", [96, -4], "'shape'"), ("shape", [1, 1, 1, 1, 1], "'shape'"),
                               ("shape", "96x4", "'shape'"), ("crc32", 1 << 33, "'crc32'"),
                               ("kind", "points", "'kind'"), ("sensor_id", "gate-b", "'sensor_id'")]:
        rejected(raw("yard-a/adc", adc_header(sensor, yard_frame, **{field: value}), p), "malformed", word)
    h = adc_header(sensor, yard_frame)
    del h["run"]
    rejected(raw("yard-a/adc", h, p), "malformed", "'run' is missing")
    rejected(raw("yard-a/health", {"wire": 3, "kind": "health", "sensor_id": "yard-a"} | health_fields(), b"x"),
             "malformed", "payload")


def test_wire_version(sensor, yard_frame):
    # msgpack keeps integers and floats apart (msgpack specification, Furuhashi, 2013: int and float
    # families); README "Wire format" makes the version the integer 3, so 3.0 and true are no version;
    # versions 1 and 2 (the 64- and 76-byte records, before the frontend kind) are refused, not misread
    for v in (1, 2, 4, 0, "3", None, 3.0, True, 1.5):
        err = rejected(raw("yard-a/adc", adc_header(sensor, yard_frame, wire=v), yard_frame.tobytes()),
                       "wire_version", "'wire'")
        assert f"'wire' = {v!r}: must be the integer 3" in str(err)


def test_strided_buffers_are_read_as_their_bytes(sensor, yard_frame):
    """A part is the bytes Python's bytes(part) gives (C order for any buffer, Python docs,
    memoryview.tobytes): a strided view decodes exactly as its contiguous copy would."""
    parts = encode_adc(sensor.sensor_id, 9, "r", 0.9, yard_frame, sensor.digest)
    ref = decode([bytes(p) for p in parts])
    spread = []
    for p in parts:  # every byte at an even offset of a buffer twice as long: a step-2 view
        wide = np.zeros(2 * len(bytes(p)), np.uint8)
        wide[::2] = np.frombuffer(bytes(p), np.uint8)
        spread.append(wide[::2])
    assert not any(v.flags.c_contiguous for v in spread)
    msg = decode(spread)
    assert msg.header == ref.header and np.array_equal(msg.data, ref.data) and msg.data.dtype == ref.data.dtype
    # a transposed (Fortran-order) frame: its bytes are those of its C-order copy, CRC included
    cube = np.asfortranarray(yard_frame)
    assert not cube.flags.c_contiguous
    h = adc_header(sensor, yard_frame)  # crc32 of yard_frame.tobytes(): C order
    assert np.array_equal(decode(raw("yard-a/adc", h, cube)).data, yard_frame)
    # a strided view whose bytes differ from the header's CRC is still caught
    flipped = yard_frame[..., ::-1]
    assert not flipped.flags.c_contiguous and flipped.tobytes() != yard_frame.tobytes()
    rejected(raw("yard-a/adc", h, flipped), "crc", "'crc32'")


def test_parts_without_exportable_bytes_are_malformed():
    values = np.zeros((2, 2), np.float32)
    good = encode_rdmap("yard-a", 0, 0.0, values, 0.0, 1.0, 0.0, 1.0)
    for bad in (np.zeros(4, "M8[s]"), object(), 3.5):  # numpy cannot export datetimes as a buffer
        err = rejected([good[0], good[1], bad], "malformed", "message part 2", type(bad).__name__)
        assert not isinstance(err.__cause__, TypeError)


def test_rdmap_encoder_refuses_steps_that_are_not_positive():
    values = np.zeros((2, 2), np.float32)
    axes = {"range_start_m": 0.0, "range_step_m": 0.2, "velocity_start_mps": -1.0, "velocity_step_mps": 0.5}
    for field in ("range_step_m", "velocity_step_mps"):
        for v in (0.0, -0.5, float("nan"), float("inf")):
            with pytest.raises(WireError) as info:
                encode_rdmap("yard-a", 0, 0.0, values, **(axes | {field: v}))
            assert f"rdmap header field '{field}' = {v!r}: must be a finite number > 0" in str(info.value)
    for field in ("range_start_m", "velocity_start_mps"):
        with pytest.raises(WireError, match=f"'{field}' = nan: must be a finite number"):
            encode_rdmap("yard-a", 0, 0.0, values, **(axes | {field: float("nan")}))


def test_dtype(sensor, yard_frame):
    as_f8 = yard_frame.astype("<f8")
    rejected(raw("yard-a/adc", adc_header(sensor, as_f8), as_f8.tobytes()), "dtype", "'dtype'", "<f8")
    rejected(raw("yard-a/adc", adc_header(sensor, yard_frame, dtype=">i2"), yard_frame.tobytes()), "dtype", "'dtype'")
    fields = [list(f) for f in POINT_WIRE_FIELDS]
    fields[2][2] = "<f8"
    h = {"wire": 3, "kind": "points", "sensor_id": "yard-a", "seq": 0, "run": "r", "timestamp_s": 0.0,
         "latency_s": 0.0, "count": 0, "fields": fields}
    rejected(raw("yard-a/points", h), "dtype", "'fields'")
    with pytest.raises(WireError) as info:
        encode_adc("yard-a", 0, "r", 0.0, np.zeros(4, np.int64), sensor.digest)
    assert info.value.reason == "dtype"


def test_shape_payload_length(sensor, yard_frame):
    p = yard_frame.tobytes()
    rejected(raw("yard-a/adc", adc_header(sensor, yard_frame), p[:-2]), "shape", "196606 bytes", "196608")
    rejected(raw("yard-a/adc", adc_header(sensor, yard_frame, shape=[96, 4, 64, 2]), p), "shape", "shape")
    h = {"wire": 3, "kind": "points", "sensor_id": "yard-a", "seq": 0, "run": "r", "timestamp_s": 0.0,
         "latency_s": 0.0, "count": 2, "fields": [list(f) for f in POINT_WIRE_FIELDS]}
    rejected(raw("yard-a/points", h, bytes(64)), "shape", "count 2")
    h = {"wire": 3, "kind": "rdmap", "sensor_id": "yard-a", "seq": 0, "timestamp_s": 0.0, "shape": [256, 64],
         "dtype": "<f4", "range_start_m": 0.0, "range_step_m": 0.2, "velocity_start_mps": -1.0,
         "velocity_step_mps": 0.1, "unit": "dB"}
    rejected(raw("yard-a/rdmap", h, bytes(256 * 64 * 4)), "shape", "'shape'")


def test_crc(sensor, yard_frame):
    parts = encode_adc(sensor.sensor_id, 0, "r", 0.0, yard_frame.copy(), sensor.digest)
    corrupt = bytearray(parts[2])
    corrupt[1000] ^= 0x01  # one flipped bit: CRC-32 detects every single-bit error (common practice)
    rejected([parts[0], parts[1], bytes(corrupt)], "crc", "'crc32'")


def test_oversized(sensor, yard_frame):
    p = yard_frame.tobytes()
    rejected(raw("yard-a/adc", adc_header(sensor, yard_frame), p), "oversized", "payload", max_payload_bytes=len(p) - 1)
    big = adc_header(sensor, yard_frame, note="x" * MAX_HEADER_BYTES)
    rejected(raw("yard-a/adc", big, p), "oversized", "header")
    rejected([b"y" * 300 + b"/adc", msgpack.packb({}), b""], "oversized", "topic")
    h = adc_header(sensor, yard_frame, note=list(range(5000)))  # array longer than the unpacker allows
    rejected(raw("yard-a/adc", h, p), "oversized", "max_array_len")
    # a sensor description may be larger (1 MiB) than other headers (64 KiB)
    s = {"wire": 3, "kind": "sensor", "sensor_id": "yard-a", "digest": sensor.digest,
         "sensor_toml": sensor.source_text + "#" * 100_000, "summary": decode(encode_sensor(sensor)).header["summary"]}
    assert decode(raw("yard-a/sensor", s)).kind == "sensor"
    s["sensor_toml"] = "#" * (1 << 20)
    rejected(raw("yard-a/sensor", s), "oversized", "header")


def test_reasons_are_the_documented_list():
    assert REASONS == ("malformed", "wire_version", "unknown_sensor", "digest", "shape", "dtype", "crc",
                       "repeated", "oversized")
    with pytest.raises(AssertionError):
        WireError("nonsense", "x")
    err = WireError("crc", "adc header field 'crc32' = 0x1: mismatch")
    assert err.reason == "crc" and str(err) == "adc header field 'crc32' = 0x1: mismatch"


# ---- the bytes on the wire -------------------------------------------------------------------------

def test_encoded_headers_are_the_documented_msgpack_maps(sensor, yard_frame):
    # README "Wire format": the header is a msgpack map of exactly these keys in this order, packed by
    # the msgpack reference implementation (msgpack.org spec; use_bin_type=True, the str/bin types of
    # the 2013 revision); the bytes must not change across versions of the encoder.
    fields = [list(f) for f in POINT_WIRE_FIELDS]
    rec = np.zeros(2, RECORD_DTYPE)
    cases = [
        (encode_adc("yard-a", 7, "r1", 0.7, yard_frame, sensor.digest),
         {"wire": 3, "kind": "adc", "sensor_id": "yard-a", "seq": 7, "run": "r1", "timestamp_s": 0.7,
          "dtype": "<i2", "shape": [96, 4, 128, 2], "digest": sensor.digest,
          "crc32": zlib.crc32(yard_frame.tobytes())}, yard_frame.tobytes()),
        (encode_points("yard-a", 7, "r1", 0.7, 0.004, rec),
         {"wire": 3, "kind": "points", "sensor_id": "yard-a", "seq": 7, "run": "r1", "timestamp_s": 0.7,
          "latency_s": 0.004, "count": 2, "fields": fields}, rec.tobytes()),
        (encode_rdmap("yard-a", 3, 0.3, np.ones((2, 3), np.float32), 0.0, 0.2, -1.0, 0.5),
         {"wire": 3, "kind": "rdmap", "sensor_id": "yard-a", "seq": 3, "timestamp_s": 0.3, "shape": [2, 3],
          "dtype": "<f4", "range_start_m": 0.0, "range_step_m": 0.2, "velocity_start_mps": -1.0,
          "velocity_step_mps": 0.5, "unit": "dB"}, np.ones((2, 3), "<f4").tobytes()),
        (encode_health("yard-a", health_fields()),
         {"wire": 3, "kind": "health", "sensor_id": "yard-a"} | health_fields(), b""),
    ]
    for parts, header, payload in cases:
        assert bytes(parts[1]) == msgpack.packb(header, use_bin_type=True), header["kind"]
        assert bytes(parts[0]) == f"yard-a/{header['kind']}".encode() and bytes(parts[2]) == payload
    # the point record: 8 + 8 + 12 * 4 bytes, little-endian, no padding, the chain's record exactly
    assert wire.RECORD_DTYPE == RECORD_DTYPE and wire.RECORD_DTYPE.itemsize == 80


# ---- the rules the daemon, the workers and the viewer share --------------------------------------

def test_idle_health_with_nil_latencies_is_valid():
    # serve's health when no frame was processed in the interval: both latencies are nil (README "Wire format")
    msg = decode(encode_health("yard-a", health_fields(latency_p50_ms=None, latency_p99_ms=None, fps=0.0)))
    assert msg.header["latency_p50_ms"] is None and msg.header["latency_p99_ms"] is None
    h = {"wire": 3, "kind": "health", "sensor_id": "yard-a"} | health_fields(latency_p50_ms=-1.0)
    rejected(raw("yard-a/health", h), "malformed", "'latency_p50_ms'", "or nil")
    h = {"wire": 3, "kind": "health", "sensor_id": "yard-a"} | health_fields(latency_p99_ms="n/a")
    rejected(raw("yard-a/health", h), "malformed", "'latency_p99_ms'")


def test_sensor_ids_follow_the_sensor_files_rule(sensor, yard_frame):
    p = yard_frame.tobytes()
    for good in ("yard-a", "a", "S_1.b", "x" * 64):
        h = adc_header(sensor, yard_frame, sensor_id=good)
        assert decode(raw(f"{good}/adc", h, p)).sensor_id == good
    for bad in ("site/yard-a", "yard a", "yard:a", "x" * 65, ""):
        h = adc_header(sensor, yard_frame, sensor_id=bad)
        rejected(raw(f"{bad}/adc", h, p), "malformed", "topic")
        with pytest.raises(WireError):
            encode_adc(bad, 0, "r", 0.0, yard_frame, sensor.digest)
    # the same verdict as the sensor file's `id` rule (one pattern, wire.SENSOR_ID_PATTERN)
    for candidate in ("yard-a", "S_1.b", "ünï-2", "site/yard-a", "yard a", "a+b", "x²", "tab\t", "end\n", "x" * 65):
        text = sensor_text().replace('id = "test-sensor"', f"id = {json.dumps(candidate)}")  # a TOML basic string
        try:
            parse_sensor(text)
            ok_in_file = True
        except CubecastError:
            ok_in_file = False
        assert wire.valid_sensor_id(candidate) == ok_in_file, candidate


def test_seq_spans_u64_everywhere(sensor, yard_frame):
    # seq is the records' `frame` field and the capture's u64 sequence (README): 0..2^64-1
    p = yard_frame.tobytes()
    top = (1 << 64) - 1
    assert decode(raw("yard-a/adc", adc_header(sensor, yard_frame, seq=top), p)).seq == top
    assert decode(encode_points("yard-a", top, "r", 0.0, 0.0, np.empty(0, RECORD_DTYPE))).seq == top
    assert decode(encode_rdmap("yard-a", top, 0.0, np.zeros((2, 2), np.float32), 0, 1, 0, 1)).seq == top
    rejected(raw("yard-a/adc", adc_header(sensor, yard_frame, seq=-1), p), "malformed", "'seq'",
             "0..18446744073709551615")


def test_errors_name_the_kind_the_field_and_the_rule(sensor):
    s = decode(encode_sensor(sensor)).header
    bad = s | {"summary": s["summary"] | {"range_resolution_m": 0.0}}
    rejected(raw("yard-a/sensor", bad), "malformed", "sensor header field 'summary.range_resolution_m' = 0.0",
             "> 0")
    bad = s | {"summary": "far"}
    rejected(raw("yard-a/sensor", bad), "malformed", "'summary' = 'far'", "must be a map")
    summary = dict(s["summary"])
    del summary["max_range_m"]
    rejected(raw("yard-a/sensor", s | {"summary": summary}), "malformed", "'summary.max_range_m' is missing")
    h = {"wire": 3, "kind": "rdmap", "sensor_id": "yard-a", "seq": 0, "timestamp_s": 0.0, "shape": [2, 2],
         "dtype": "<f4", "range_start_m": 0.0, "range_step_m": 0.2, "velocity_start_mps": -1.0,
         "velocity_step_mps": 0.1, "unit": "dB"}
    assert decode(raw("yard-a/rdmap", h, bytes(16))).data.shape == (2, 2)
    rejected(raw("yard-a/rdmap", h | {"dtype": "<f8"}, bytes(16)), "dtype", "rdmap header field 'dtype'", "'<f4'")
    rejected(raw("yard-a/rdmap", h | {"range_step_m": 0.0}, bytes(16)), "malformed", "'range_step_m'", "> 0")
    rejected(raw("yard-a/rdmap", h | {"unit": "dBFS"}, bytes(16)), "malformed", "'unit'", "'dB'")
    rejected(raw("yard-a/rdmap", h | {"shape": [2, True]}, bytes(16)), "malformed", "'shape'")
    # keys a kind does not define are ignored, whatever they hold (within the msgpack bounds)
    assert decode(raw("yard-a/rdmap", h | {"note": {"any": [1, "x", None]}}, bytes(16))).kind == "rdmap"
