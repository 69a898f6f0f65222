"""Fuzz tests (hypothesis, bounded examples) of the two readers of outside bytes: the wire decoder
and the capture reader.

Invariants checked, each stated beside its test:

- wire.decode on any input raises nothing but WireError; a message it accepts keeps the contract of
  README "Wire format" (payload length and CRC as the header says, the version the integer 1).
- CaptureReader on a damaged copy of a valid capture (deletions, insertions, bit flips, truncation,
  duplicated records; one to three of them, anywhere after the file header):
  1. opening raises nothing (the file header is intact), reading raises nothing but CubecastError;
  2. every frame handed out as valid equals a frame that was written (nothing invented);
  3. every written record whose bytes are still present, whole, in the damaged file is recovered,
     when the damage was one mutation; with several, every such record whose written neighbours
     are also present (not adjacent to damage);
  4. the counts agree with what the test sees: copies and backward sequences counted from the
     index, unindexed bytes from the frames' sizes, one problem line per counted event;
  5. nothing is lost silently: with no problem reported, the damaged file is exactly the file
     header followed by whole written records (a shorter valid capture, gaps visible in sequence).
"""

from __future__ import annotations

import math
import os
import struct
import tempfile
import zlib

import msgpack
import numpy as np
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from cubecast.daemon import wire
from cubecast.daemon.capture import (COUNT_NAMES, RECORD_HEADER_SIZE, CaptureReader, CaptureWriter,
                                     CorruptFrameError)
from cubecast.daemon.chain.points import RECORD_DTYPE
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.sensor import load_sensor
from tests.helpers import YARD_SENSOR

FUZZ = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
DIGEST = "0123456789abcdef"


# ---- wire ------------------------------------------------------------------------------------------
def valid_messages() -> list[list[bytes]]:
    rng = np.random.default_rng(2)
    adc = rng.integers(-2000, 2000, size=(3, 2, 4, 2)).astype(np.int16)
    pts = np.zeros(2, RECORD_DTYPE)
    pts["range_m"] = [3.0, 4.5]
    health = {"uptime_s": 1.0, "frames_received": 3, "frames_processed": 3, "frames_dropped": 0,
              "frames_rejected": 0, "rejected": {}, "sequence_gaps": 0, "source_restarts": 0,
              "latency_p50_ms": 2.0, "latency_p99_ms": None, "queue_depth": 0, "cpu_share": 0.1,
              "points_last": 2, "fps": 10.0}
    msgs = [wire.encode_adc("yard-a", 7, "run1", 0.7, adc, DIGEST),
            wire.encode_points("yard-a", 7, "run1", 0.7, 0.01, pts),
            wire.encode_rdmap("yard-a", 7, 0.7, rng.standard_normal((4, 3)).astype(np.float32), 0.1, 0.2, -1.0, 0.5),
            wire.encode_sensor(load_sensor(YARD_SENSOR)),
            wire.encode_health("yard-a", health)]
    return [[bytes(p) for p in m] for m in msgs]


VALID = valid_messages()


def check_accepted(msg: wire.Message) -> None:
    """What an accepted message must satisfy (README "Wire format")."""
    h = msg.header
    assert type(h["wire"]) is int and h["wire"] == 3
    assert msg.topic.endswith("/" + h["kind"]) and h["sensor_id"] == msg.sensor_id
    if msg.kind == "adc":
        assert zlib.crc32(msg.payload) == h["crc32"]
        assert msg.data.nbytes == msg.payload.nbytes == math.prod(h["shape"]) * np.dtype(h["dtype"]).itemsize
    elif msg.kind == "points":
        assert msg.data.dtype == RECORD_DTYPE and msg.payload.nbytes == 80 * h["count"]
    elif msg.kind == "rdmap":
        assert list(msg.data.shape) == h["shape"] and h["range_step_m"] > 0 and h["velocity_step_mps"] > 0
    else:
        assert msg.data is None and msg.payload.nbytes == 0


def decode_or_wire_error(parts) -> None:
    try:
        msg = wire.decode(parts)
    except wire.WireError as exc:
        assert exc.reason in wire.REASONS and str(exc)
        return
    check_accepted(msg)


@FUZZ
@given(st.lists(st.binary(max_size=200), max_size=4))
def test_decode_arbitrary_bytes(parts):
    decode_or_wire_error(parts)


@FUZZ
@given(topic=st.sampled_from([m[0] for m in VALID] + [b"yard-a/adc", b"/adc", b"a/b/points"]),
       header=st.binary(max_size=300), payload=st.binary(max_size=100))
def test_decode_arbitrary_headers_behind_valid_topics(topic, header, payload):
    decode_or_wire_error([topic, header, payload])


def mutate_bytes(data: bytes, ops) -> bytes:
    out = bytearray(data)
    for kind, where, arg in ops:
        at = where % (len(out) + 1)
        if kind == "delete":
            del out[at: at + arg]
        elif kind == "insert":
            out[at:at] = bytes([arg & 0xFF]) * (1 + arg // 256)
        elif kind == "flip" and out:
            out[at % len(out)] ^= 1 << (arg % 8)
        elif kind == "truncate":
            del out[at:]
    return bytes(out)


byte_ops = st.lists(st.tuples(st.sampled_from(["delete", "insert", "flip", "truncate"]),
                              st.integers(0, 1 << 20), st.integers(0, 1000)), min_size=1, max_size=4)


@FUZZ
@given(which=st.integers(0, len(VALID) - 1), part=st.integers(0, 2), ops=byte_ops)
def test_decode_mutated_valid_messages(which, part, ops):
    parts = list(VALID[which])
    parts[part] = mutate_bytes(parts[part], ops)
    decode_or_wire_error(parts)


msgpack_values = st.recursive(
    st.none() | st.booleans() | st.integers(-2**64, 2**64 - 1) | st.floats() | st.text(max_size=20)
    | st.binary(max_size=20),
    lambda kids: st.lists(kids, max_size=4) | st.dictionaries(st.text(max_size=8), kids, max_size=4),
    max_leaves=12)


@FUZZ
@given(which=st.integers(0, len(VALID) - 1), data=st.data(), value=msgpack_values)
def test_decode_valid_messages_with_one_field_replaced(which, data, value):
    topic, header, payload = VALID[which]
    fields = msgpack.unpackb(header)
    name = data.draw(st.sampled_from(sorted(fields)))
    try:
        packed = msgpack.packb(fields | {name: value}, use_bin_type=True)
    except (OverflowError, ValueError):  # beyond msgpack's integers
        return
    try:
        msg = wire.decode([topic, packed, payload])
    except wire.WireError as exc:
        # the error names the replaced field (or a field inside it), or the payload it no longer fits
        assert f"'{name}" in str(exc) or exc.reason in ("oversized", "crc", "shape"), str(exc)
        return
    check_accepted(msg)
    if name in ("seq", "count", "crc32") or name.startswith("frames_"):
        assert type(value) is int and 0 <= value < 2**64


# ---- capture ---------------------------------------------------------------------------------------
@st.composite
def captures(draw):
    """(frames, seqs) of a valid capture: small payloads of varied sizes, sequences going up by 1..3."""
    n = draw(st.integers(2, 7))
    seq = draw(st.integers(0, 1000))
    frames = []
    for k in range(n):
        size = draw(st.sampled_from([0, 1, 7, 16, 40, 64, 150]))
        payload = np.frombuffer(draw(st.binary(min_size=size, max_size=size)), np.uint8)
        frames.append((payload.copy(), seq, 0.05 * k))
        seq += draw(st.integers(1, 3))
    return frames


capture_ops = st.lists(st.tuples(st.sampled_from(["delete", "insert", "flip", "truncate", "duplicate"]),
                                 st.integers(0, 1 << 20), st.integers(1, 400), st.binary(min_size=1, max_size=60)),
                       min_size=1, max_size=3)


def damage(data: bytes, start: int, records: list[bytes], ops) -> bytes:
    """Apply ops to the bytes after `start` (the file header stays intact)."""
    out = bytearray(data)
    for kind, where, n, junk in ops:
        at = start + where % (len(out) - start + 1)
        if kind == "delete":
            del out[at: at + n]
        elif kind == "insert":
            out[at:at] = junk
        elif kind == "flip" and at < len(out):
            out[at] ^= 1 << (n % 8)
        elif kind == "truncate":
            del out[at:]
        elif kind == "duplicate":
            out[at:at] = records[n % len(records)]
    return bytes(out)


def record_bytes(data: bytes, start: int, count: int) -> list[bytes]:
    """Each written record's bytes, walking the documented layout (payload_nbytes at offset 40)."""
    out, pos = [], start
    for _ in range(count):
        (nbytes,) = struct.unpack_from("<Q", data, pos + 40)
        out.append(data[pos: pos + RECORD_HEADER_SIZE + nbytes])
        pos += RECORD_HEADER_SIZE + nbytes
    assert pos == len(data)
    return out


@FUZZ
@given(frames=captures(), ops=capture_ops)
def test_capture_reader_on_damaged_captures(frames, ops):
    with tempfile.TemporaryDirectory() as d:
        src, bad = os.path.join(d, "ok.cap"), os.path.join(d, "bad.cap")
        with CaptureWriter(src, "a = 1\n", created_utc="2024-01-01T00:00:00+00:00") as w:
            for payload, seq, ts in frames:
                w.write(payload, seq, ts)
        data = open(src, "rb").read()
        (json_len,) = struct.unpack_from("<I", data, 10)
        start = 18 + json_len
        records = record_bytes(data, start, len(frames))
        damaged = damage(data, start, records, ops)
        open(bad, "wb").write(damaged)

        r = CaptureReader(bad, skip_corrupt=True)  # 1. the file header is intact: opening must work
        with r:
            got = []
            for f in r:
                got.append((f.index, f.sequence, f.timestamp_s, f.payload.tobytes()))
            written = [(seq, ts, payload.tobytes()) for payload, seq, ts in frames]
            # 2. nothing invented
            assert all(g[1:] in written for g in got)
            # 3. every record still present whole is recovered (with several mutations: unless a
            #    written neighbour is not present)
            present = [rec in damaged for rec in records]
            recovered = {g[1:] for g in got}
            for k, w_ in enumerate(written):
                near = present[max(k - 1, 0): k + 2]
                if present[k] and (len(ops) == 1 or all(near)):
                    assert w_ in recovered, (k, ops, r.problems)
            check_counts(r, got, size=len(damaged), start=start)
            event(f"written frames not recovered: {len(written) - len(recovered & set(written))}")
            for name, v in r.counts.items():
                if v and name != "unindexed_bytes":
                    event(f"counted: {name}")
            # 5. no silent loss
            if not r.problems:
                assert damaged == data[:start] + b"".join(records[written.index(g[1:])] for g in got)


def check_counts(r: CaptureReader, got, size: int, start: int) -> None:
    """4. counts against what the test sees through the reader's index."""
    counts = r.counts
    assert set(counts) == set(COUNT_NAMES)
    repeats = [i for i in range(len(r)) if r.repeat_of(i) is not None]
    assert counts["repeated"] == len(repeats)
    readable = {g[0]: g[1:] for g in got}
    for i in repeats:  # a copy of a readable frame that is itself readable is the same frame
        j = r.repeat_of(i)
        assert j < i and r.frame_sequence(i) == r.frame_sequence(j)
        if i in readable and j in readable:
            assert readable[i] == readable[j]
    seen: dict = {}
    for i, frame in sorted(readable.items()):  # and a readable copy of a readable frame is flagged
        if frame in seen and r.frame_shape(i) == r.frame_shape(seen[frame]):
            assert r.repeat_of(i) is not None
        seen.setdefault(frame, i)
    backwards, last = 0, None
    for i in range(len(r)):
        if i in repeats:
            continue
        backwards += last is not None and r.frame_sequence(i) <= last
        last = r.frame_sequence(i)
    assert counts["sequence_backwards"] == backwards
    sizes = sum(RECORD_HEADER_SIZE + math.prod(r.frame_shape(i)) * r.frame_dtype(i).itemsize for i in range(len(r)))
    assert counts["unindexed_bytes"] == size - start - sizes
    assert counts["corrupt_skipped"] == len(r) - len(got)
    assert len(r.problems) == sum(v for k, v in counts.items() if k != "unindexed_bytes")
    for i in range(len(r)):
        if i not in readable:
            try:
                r.read(i)
            except CorruptFrameError:
                continue
            raise AssertionError(f"frame {i} was skipped but reads")


@FUZZ
@given(frames=captures(), where=st.integers(0, 1 << 20), n=st.integers(1, 50), kind=st.sampled_from(
    ["delete", "insert", "flip", "truncate"]))
def test_capture_reader_with_a_damaged_file_header_fails_cleanly(frames, where, n, kind):
    """Damage anywhere, the file header included: CubecastError or a reader whose frames are written ones."""
    with tempfile.TemporaryDirectory() as d:
        src, bad = os.path.join(d, "ok.cap"), os.path.join(d, "bad.cap")
        with CaptureWriter(src, "a = 1\n", ground_truth={"t": [1, [2, [3]]]}) as w:
            for payload, seq, ts in frames:
                w.write(payload, seq, ts)
        data = open(src, "rb").read()
        open(bad, "wb").write(damage(data, 0, [b""], [(kind, where % 120, n, b"\x00" * n)]))
        try:
            r = CaptureReader(bad, skip_corrupt=True)
        except CubecastError:
            return
        written = [(seq, ts, payload.tobytes()) for payload, seq, ts in frames]
        with r:
            assert all((f.sequence, f.timestamp_s, f.payload.tobytes()) in written for f in r)
