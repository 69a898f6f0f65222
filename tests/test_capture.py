"""Tests for daemon/capture.py: the cubecast capture file format (writer, reader, recovery)."""

from __future__ import annotations

import datetime as dt
import json
import os
import struct
import tempfile
import zlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from cubecast.daemon.capture import (
    DTYPE_CODES,
    FORMAT_VERSION,
    MAGIC,
    RECORD_HEADER_SIZE,
    RECORD_MARKER,
    CaptureFrame,
    CaptureReader,
    CaptureWriter,
    CorruptFrameError,
    FrameIndexError,
)
from cubecast.daemon.errors import CubecastError

SENSOR_TOML = '[sensor]\nname = "bench unit 7"\nstart_hz = 77.0e9\n'


# ---- independent CRC-32 reference --------------------------------------------------------------
def crc32_bitwise(data: bytes) -> int:
    """CRC-32 as parametrised in Ross N. Williams, "A Painless Guide to CRC Error Detection
    Algorithms" (1993): width 32, poly 0x04C11DB7 (reflected 0xEDB88320), init 0xFFFFFFFF,
    reflected in and out, final XOR 0xFFFFFFFF. Bit-by-bit, written independently of zlib."""
    crc = 0xFFFFFFFF
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ (0xEDB88320 if crc & 1 else 0)
    return crc ^ 0xFFFFFFFF


def test_crc32_check_value_identifies_the_crc():
    # The standard CRC-32 (ISO 3309 / ITU-T V.42) check value of b"123456789" is 0xCBF43926
    # (common practice; value from memory, also the "check" entry of Williams 1993's CRC-32 model).
    assert zlib.crc32(b"123456789") == 0xCBF43926
    assert crc32_bitwise(b"123456789") == 0xCBF43926
    # zlib.crc32 (the reference the format uses) agrees with the bitwise definition on other input.
    blob = bytes(range(256)) * 3 + b"cubecast"
    assert zlib.crc32(blob) == crc32_bitwise(blob)


# ---- helpers -----------------------------------------------------------------------------------
def write_frames(path, frames, ground_truth=None, metadata=None):
    with CaptureWriter(path, SENSOR_TOML, ground_truth=ground_truth, metadata=metadata) as w:
        for payload, seq, ts in frames:
            w.write(payload, seq, ts)


def small_frames(n=4, shape=(4, 2)):
    rng = np.random.default_rng(7)
    return [(rng.integers(-3000, 3000, size=shape).astype(np.int16), 100 + k, 0.05 * k) for k in range(n)]


def file_header_size(path) -> int:
    with open(path, "rb") as f:
        head = f.read(14)
    (json_len,) = struct.unpack_from("<I", head, 10)
    return 14 + json_len + 4


def record_offsets(path) -> list[int]:
    """Record header offsets, walking the documented layout directly (as a C reader would)."""
    data = open(path, "rb").read()
    pos = file_header_size(path)
    out = []
    while pos < len(data):
        out.append(pos)
        (nbytes,) = struct.unpack_from("<Q", data, pos + 40)
        pos += RECORD_HEADER_SIZE + nbytes
    return out


def flip_byte(path, offset, new_path):
    data = bytearray(open(path, "rb").read())
    data[offset] ^= 0xFF
    open(new_path, "wb").write(bytes(data))


# ---- format layout as documented ---------------------------------------------------------------
def test_stored_bytes_follow_documented_layout_and_standard_crc(tmp_path):
    p = tmp_path / "layout.cap"
    payload = np.arange(6, dtype=np.float32).reshape(2, 3)
    write_frames(p, [(payload, 42, 1.25)])
    data = open(p, "rb").read()
    assert data[:8] == MAGIC
    version, json_len = struct.unpack_from("<HI", data, 8)
    assert version == FORMAT_VERSION == 1
    json_bytes = data[14 : 14 + json_len]
    (json_crc,) = struct.unpack_from("<I", data, 14 + json_len)
    assert json_crc == crc32_bitwise(json_bytes)
    header = json.loads(json_bytes.decode("utf-8"))
    assert header["sensor_toml"] == SENSOR_TOML
    rec = 14 + json_len + 4
    fields = struct.unpack_from("<4sQdBBH4IQII", data, rec)
    marker, seq, ts, code, ndim, reserved, d0, d1, d2, d3, nbytes, pcrc, hcrc = fields
    assert (marker, seq, ts, code, ndim, reserved) == (RECORD_MARKER, 42, 1.25, 3, 2, 0)
    assert (d0, d1, d2, d3) == (2, 3, 0, 0)
    assert nbytes == 24
    raw = data[rec + 56 : rec + 56 + 24]
    assert raw == payload.astype("<f4").tobytes(order="C")
    assert pcrc == crc32_bitwise(raw)
    assert hcrc == crc32_bitwise(data[rec : rec + 52])
    assert len(data) == rec + 56 + 24


def test_file_built_by_hand_from_the_spec_is_read(tmp_path):
    """A file assembled field by field with struct, the way a C program following the spec would."""
    p = tmp_path / "by_hand.cap"
    header = {"sensor_toml": "a = 1\n", "created_utc": "2024-01-02T03:04:05+00:00", "extra_key": [1, 2]}
    jb = json.dumps(header).encode("utf-8")
    out = bytearray(MAGIC + struct.pack("<HI", 1, len(jb)) + jb + struct.pack("<I", crc32_bitwise(jb)))
    iq = np.array([[[1, -1], [2, -2], [3, -3]]], dtype="<i2")  # int16 I/Q, trailing dim 2
    for seq, ts, code, arr in [(5, 10.0, 2, iq), (6, 10.5, 4, np.array([9, 8, 7], dtype=np.uint8))]:
        raw = arr.tobytes()
        dims = list(arr.shape) + [0] * (4 - arr.ndim)
        body = struct.pack("<4sQdBBH4IQI", b"CCFR", seq, ts, code, arr.ndim, 0, *dims, len(raw), crc32_bitwise(raw))
        out += body + struct.pack("<I", crc32_bitwise(body)) + raw
    open(p, "wb").write(bytes(out))
    with CaptureReader(p) as r:
        assert r.problems == []
        assert r.sensor_toml == "a = 1\n"
        assert r.ground_truth is None and r.metadata == {}
        assert r.created_utc == "2024-01-02T03:04:05+00:00"
        assert len(r) == 2
        f0, f1 = r[0], r[1]
        assert f0.payload.dtype == np.int16 and f0.payload.shape == (1, 3, 2)
        np.testing.assert_array_equal(f0.payload, iq)
        assert (f0.sequence, f0.timestamp_s) == (5, 10.0)
        np.testing.assert_array_equal(f1.payload, [9, 8, 7])


# ---- round trip --------------------------------------------------------------------------------
def test_round_trip_dtypes_ground_truth_metadata(tmp_path):
    p = tmp_path / "rt.cap"
    rng = np.random.default_rng(1)
    cube = (rng.standard_normal((8, 4, 3)) + 1j * rng.standard_normal((8, 4, 3))).astype(np.complex64)
    iq = rng.integers(-2048, 2048, size=(4, 16, 2), dtype=np.int16)
    f32 = rng.standard_normal((2, 3, 4, 5)).astype(np.float32)
    u8 = rng.integers(0, 256, size=(7,), dtype=np.uint8)
    frames = [(cube, 0, 0.0), (iq, 1, 0.1), (f32, 2, 0.2), (u8, 3, 0.3), (np.float64(2.5) * np.ones(3), 4, 0.4)]
    truth = {
        "targets": [{"range_m": np.float32(12.5), "velocity_mps": -1.25, "position_m": np.array([1.0, 12.0, 0.5])}],
        "grid": np.arange(6, dtype=np.int16).reshape(2, 3),
        "flag": np.bool_(True),
    }
    write_frames(p, frames, ground_truth=truth, metadata={"scene": "corridor", "note": "ünïcödé"})
    with CaptureReader(p) as r:
        assert r.version == 1
        assert r.problems == []
        assert r.sensor_toml == SENSOR_TOML
        assert r.metadata == {"scene": "corridor", "note": "ünïcödé"}
        assert r.ground_truth == {
            "targets": [{"range_m": 12.5, "velocity_mps": -1.25, "position_m": [1.0, 12.0, 0.5]}],
            "grid": [[0, 1, 2], [3, 4, 5]],
            "flag": True,
        }
        created = dt.datetime.fromisoformat(r.created_utc)
        assert created.utcoffset() == dt.timedelta(0)
        assert len(r) == len(frames)
        got = list(r)
        for k, (frame, (payload, seq, ts)) in enumerate(zip(got, frames)):
            assert isinstance(frame, CaptureFrame)
            assert frame.index == k and frame.sequence == seq and frame.timestamp_s == ts
            assert frame.payload.dtype == payload.dtype and frame.payload.shape == payload.shape
            assert frame.payload.tobytes() == payload.tobytes()
            assert r.frame_shape(k) == payload.shape and r.frame_dtype(k) == payload.dtype


def test_non_contiguous_and_big_endian_payloads_are_stored_c_order_little_endian(tmp_path):
    p = tmp_path / "order.cap"
    base = np.arange(24, dtype=np.float32).reshape(4, 6)
    fortran_view = base.T  # not C-contiguous
    big = np.arange(5, dtype=">i2")
    write_frames(p, [(fortran_view, 0, 0.0), (big, 1, 0.0)])
    with CaptureReader(p) as r:
        np.testing.assert_array_equal(r[0].payload, fortran_view)
        assert r[0].payload.flags.c_contiguous
        assert r[1].payload.dtype == np.dtype("<i2")
        np.testing.assert_array_equal(r[1].payload, [0, 1, 2, 3, 4])
    data = open(p, "rb").read()
    assert data.endswith(np.arange(5, dtype="<i2").tobytes())


def test_random_access_in_any_order(tmp_path):
    p = tmp_path / "ra.cap"
    frames = [(np.full((3, 2), k, dtype=np.complex64) + 1j * k, 1000 + k, 0.25 * k) for k in range(12)]
    write_frames(p, frames)
    order = [7, 0, 11, 3, 3, 10, 1, 5, 9, 2, 8, 4, 6, -1, -12]
    with CaptureReader(p) as r:
        for i in order:
            f = r[i]
            k = i % 12
            assert f.index == k and f.sequence == 1000 + k and f.timestamp_s == 0.25 * k
            np.testing.assert_array_equal(f.payload, frames[k][0])
            assert r.read(i).sequence == f.sequence
        with pytest.raises(FrameIndexError, match="out of range"):
            r[12]
        with pytest.raises(IndexError):
            r[-13]


def test_read_into_fills_preallocated_buffer(tmp_path):
    p = tmp_path / "ri.cap"
    frames = [(np.full((4, 3), k + 0.5, dtype=np.float32), k, float(k)) for k in range(3)]
    write_frames(p, frames)
    out = np.empty((4, 3), dtype=np.float32)
    with CaptureReader(p) as r:
        for k in (2, 0, 1):
            f = r.read_into(k, out)
            assert f.payload is out and f.index == k and f.sequence == k
            np.testing.assert_array_equal(out, frames[k][0])
        with pytest.raises(CubecastError, match="read_into got"):
            r.read_into(0, np.empty((3, 4), dtype=np.float32))
        with pytest.raises(CubecastError, match="read_into got"):
            r.read_into(0, np.empty((4, 3), dtype=np.float64))
        with pytest.raises(CubecastError, match="C-contiguous"):
            r.read_into(0, np.empty((3, 4), dtype=np.float32).T)


def test_writer_flushes_every_frame(tmp_path):
    p = tmp_path / "live.cap"
    w = CaptureWriter(p, SENSOR_TOML)
    try:
        with CaptureReader(p) as r:
            assert len(r) == 0 and r.problems == []
        for k in range(3):
            w.write(np.full(5, k, dtype=np.uint8), k, float(k))
            # Without closing the writer, another reader must already see every written frame.
            with CaptureReader(p) as r:
                assert len(r) == k + 1 and r.problems == []
                np.testing.assert_array_equal(r[k].payload, np.full(5, k, dtype=np.uint8))
    finally:
        w.close()
    assert w.frames_written == 3


def test_empty_capture(tmp_path):
    p = tmp_path / "empty.cap"
    write_frames(p, [])
    with CaptureReader(p) as r:
        assert len(r) == 0 and list(r) == [] and r.problems == []


# ---- truncation --------------------------------------------------------------------------------
def test_truncated_tail_at_every_cut_point_keeps_earlier_frames(tmp_path):
    p = tmp_path / "full.cap"
    frames = small_frames(n=4, shape=(4, 2))  # 16-byte payloads
    write_frames(p, frames)
    data = open(p, "rb").read()
    offs = record_offsets(p)
    last = offs[-1]
    assert len(data) - last == RECORD_HEADER_SIZE + 16
    cut_file = tmp_path / "cut.cap"
    for cut in range(last, len(data) + 1):  # every byte across the last record
        open(cut_file, "wb").write(data[:cut])
        with CaptureReader(cut_file) as r:
            expect = 3 if cut < len(data) else 4
            assert len(r) == expect, cut
            got = list(r)
            assert [f.sequence for f in got] == [100 + k for k in range(expect)]
            for f, (payload, _, _) in zip(got, frames):
                np.testing.assert_array_equal(f.payload, payload)
            if cut in (last, len(data)):
                assert r.problems == []  # a cut on a record boundary is a shorter valid file
            else:
                assert len(r.problems) == 1 and "truncated tail" in r.problems[0], (cut, r.problems)
                assert "frame index 3" in r.problems[0]
    # every few bytes across the earlier records too
    for cut in range(offs[0] + 1, last, 5):
        open(cut_file, "wb").write(data[:cut])
        with CaptureReader(cut_file) as r:
            complete = sum(1 for o in offs if o + RECORD_HEADER_SIZE + 16 <= cut)
            assert len(r) == complete
            assert [f.sequence for f in r] == [100 + k for k in range(complete)]
            if cut not in offs:
                assert any("truncated tail" in m for m in r.problems)


def test_truncated_file_header_raises_clear_error(tmp_path):
    p = tmp_path / "full.cap"
    write_frames(p, small_frames(n=2), ground_truth={"targets": [1, 2, 3]})
    data = open(p, "rb").read()
    hdr_end = file_header_size(p)
    cut_file = tmp_path / "cut_header.cap"
    for cut in list(range(0, hdr_end, 3)) + [hdr_end - 1]:  # every few bytes across the file header
        open(cut_file, "wb").write(data[:cut])
        with pytest.raises(CubecastError) as ei:
            CaptureReader(cut_file)
        msg = str(ei.value)
        assert str(cut_file) in msg
        assert "truncated" in msg, msg
    # inside the JSON body specifically
    open(cut_file, "wb").write(data[: 14 + 10])
    with pytest.raises(CubecastError, match="JSON header truncated"):
        CaptureReader(cut_file)
    # exactly the header: a valid capture without frames
    open(cut_file, "wb").write(data[:hdr_end])
    with CaptureReader(cut_file) as r:
        assert len(r) == 0 and r.problems == []


# ---- corruption --------------------------------------------------------------------------------
def test_flipped_payload_byte_names_frame_and_file(tmp_path):
    p = tmp_path / "ok.cap"
    frames = small_frames(n=4)
    write_frames(p, frames)
    offs = record_offsets(p)
    bad = tmp_path / "bad_payload.cap"
    flip_byte(p, offs[1] + RECORD_HEADER_SIZE + 5, bad)
    with CaptureReader(bad) as r:
        assert len(r) == 4 and r.problems == []  # payloads are not read while indexing
        np.testing.assert_array_equal(r[0].payload, frames[0][0])
        np.testing.assert_array_equal(r[2].payload, frames[2][0])
        with pytest.raises(CorruptFrameError) as ei:
            r[1]
        assert "frame 1" in str(ei.value) and str(bad) in str(ei.value)
        assert ei.value.index == 1
        assert isinstance(ei.value, CubecastError)
        with pytest.raises(CubecastError, match="frame 1 "):
            r.read_into(1, np.empty((4, 2), dtype=np.int16))
        with pytest.raises(CubecastError, match="frame 1 "):
            list(r)  # iteration without skip_corrupt stops at the corrupt frame
    with CaptureReader(bad, skip_corrupt=True) as r:
        got = list(r)
        assert [f.index for f in got] == [0, 2, 3]
        assert [f.sequence for f in got] == [100, 102, 103]
        for f in got:
            np.testing.assert_array_equal(f.payload, frames[f.index][0])
        assert len(r.problems) == 1 and "skipped frame index 1" in r.problems[0]
        list(r)
        assert len(r.problems) == 1  # a second pass does not repeat the report
        with pytest.raises(CorruptFrameError):
            r[1]  # random access never hands out corrupt data


def test_flipped_record_header_byte_resynchronises(tmp_path):
    p = tmp_path / "ok.cap"
    frames = small_frames(n=4)
    write_frames(p, frames)
    offs = record_offsets(p)
    bad = tmp_path / "bad_header.cap"
    for b in range(RECORD_HEADER_SIZE):  # every byte of frame 1's record header
        flip_byte(p, offs[1] + b, bad)
        with CaptureReader(bad) as r:
            assert len(r) == 3, b
            assert [f.sequence for f in r] == [100, 102, 103]
            for f, k in zip(r, (0, 2, 3)):
                np.testing.assert_array_equal(f.payload, frames[k][0])
            assert len(r.problems) == 1, r.problems
            msg = r.problems[0]
            assert f"byte offset {offs[1]}" in msg and "frame index 1" in msg and f"resynchronised at byte offset {offs[2]}" in msg


def test_two_corrupt_headers_and_corrupt_last_header(tmp_path):
    p = tmp_path / "ok.cap"
    frames = small_frames(n=5)
    write_frames(p, frames)
    offs = record_offsets(p)
    data = bytearray(open(p, "rb").read())
    data[offs[1] + 30] ^= 0x01
    data[offs[2] + 13] ^= 0x80
    bad = tmp_path / "two.cap"
    open(bad, "wb").write(bytes(data))
    with CaptureReader(bad) as r:
        assert [f.sequence for f in r] == [100, 103, 104]
        assert len(r.problems) == 1 and f"resynchronised at byte offset {offs[3]}" in r.problems[0]
    data = bytearray(open(p, "rb").read())
    data[offs[4] + 2] ^= 0x10
    open(bad, "wb").write(bytes(data))
    with CaptureReader(bad) as r:
        assert [f.sequence for f in r] == [100, 101, 102, 103]
        assert len(r.problems) == 1 and "ignored to end of file" in r.problems[0]


def test_record_with_valid_crc_but_unknown_dtype_is_skipped_exactly(tmp_path):
    p = tmp_path / "future.cap"
    write_frames(p, small_frames(n=1))
    raw = b"\x01\x02\x03\x04"
    body = struct.pack("<4sQdBBH4IQI", RECORD_MARKER, 7, 0.0, 200, 1, 0, 4, 0, 0, 0, 4, zlib.crc32(raw))
    with open(p, "ab") as f:
        f.write(body + struct.pack("<I", zlib.crc32(body)) + raw)
    with CaptureWriter(tmp_path / "tail.cap", SENSOR_TOML) as w:
        w.write(np.arange(3, dtype=np.uint8), 8, 1.0)
    tail = open(tmp_path / "tail.cap", "rb").read()[file_header_size(tmp_path / "tail.cap") :]
    with open(p, "ab") as f:
        f.write(tail)
    with CaptureReader(p) as r:
        assert [f.sequence for f in r] == [100, 8]
        assert "unknown dtype code 200" in r.problems[0]
        # the appended frame's sequence 8 follows 100: reported as not going forward, read normally
        assert "sequence 8 is not after the previous frame's 100" in r.problems[1] and len(r.problems) == 2
        assert r.counts["unusable"] == 1 and r.counts["sequence_backwards"] == 1
        assert r.counts["unindexed_bytes"] == RECORD_HEADER_SIZE + 4  # the unusable record, header and payload


def test_bad_magic(tmp_path):
    p = tmp_path / "ok.cap"
    write_frames(p, small_frames(n=1))
    bad = tmp_path / "magic.cap"
    flip_byte(p, 3, bad)
    with pytest.raises(CubecastError, match="bad magic") as ei:
        CaptureReader(bad)
    assert str(bad) in str(ei.value)
    txt = tmp_path / "notes.txt"
    txt.write_text("hello, this is not a capture file at all\n")
    with pytest.raises(CubecastError, match="bad magic"):
        CaptureReader(txt)


def test_unknown_version(tmp_path):
    p = tmp_path / "ok.cap"
    write_frames(p, small_frames(n=1))
    data = bytearray(open(p, "rb").read())
    struct.pack_into("<H", data, 8, 2)
    bad = tmp_path / "v2.cap"
    open(bad, "wb").write(bytes(data))
    with pytest.raises(CubecastError, match="unknown capture format version 2") as ei:
        CaptureReader(bad)
    assert str(bad) in str(ei.value)


def test_corrupt_json_header(tmp_path):
    p = tmp_path / "ok.cap"
    write_frames(p, small_frames(n=1))
    bad = tmp_path / "json.cap"
    flip_byte(p, 20, bad)  # inside the JSON bytes
    with pytest.raises(CubecastError, match="JSON header corrupt: CRC-32 mismatch") as ei:
        CaptureReader(bad)
    assert str(bad) in str(ei.value)
    # valid CRC but the JSON lacks sensor_toml / is not an object
    for obj in ({"created_utc": "x"}, [1, 2], {"sensor_toml": 5}):
        jb = json.dumps(obj).encode()
        open(bad, "wb").write(MAGIC + struct.pack("<HI", 1, len(jb)) + jb + struct.pack("<I", zlib.crc32(jb)))
        with pytest.raises(CubecastError, match="JSON header"):
            CaptureReader(bad)
    jb = b"{not json"
    open(bad, "wb").write(MAGIC + struct.pack("<HI", 1, len(jb)) + jb + struct.pack("<I", zlib.crc32(jb)))
    with pytest.raises(CubecastError, match="not valid UTF-8 JSON"):
        CaptureReader(bad)


def test_missing_file(tmp_path):
    with pytest.raises(CubecastError, match="cannot open"):
        CaptureReader(tmp_path / "nope.cap")


# ---- writer validation -------------------------------------------------------------------------
def test_writer_rejects_bad_input(tmp_path):
    p = tmp_path / "w.cap"
    with CaptureWriter(p, SENSOR_TOML) as w:
        for bad, pattern in [
            (np.zeros(3, dtype=np.float16), "dtype float16 is not supported"),
            (np.zeros(3, dtype=bool), "dtype bool is not supported"),
            (np.zeros(3, dtype=object), "dtype object is not supported"),
            (np.zeros((1, 1, 1, 1, 1), dtype=np.float32), "ndim 5"),
            ([1, 2, 3], "must be a numpy array"),
        ]:
            with pytest.raises(CubecastError, match=pattern):
                w.write(bad, 0, 0.0)
        ok = np.zeros(2, dtype=np.uint8)
        with pytest.raises(CubecastError, match="sequence -1"):
            w.write(ok, -1, 0.0)
        with pytest.raises(CubecastError, match="sequence"):
            w.write(ok, 2**64, 0.0)
        with pytest.raises(CubecastError, match="sequence must be an integer"):
            w.write(ok, 1.5, 0.0)
        with pytest.raises(CubecastError, match="timestamp_s must be finite"):
            w.write(ok, 0, float("nan"))
        assert w.frames_written == 0
        assert w.write(ok, np.uint64(2**64 - 1), 3.0) == 0
    with pytest.raises(CubecastError, match="write after close"):
        w.write(ok, 1, 0.0)
    with CaptureReader(p) as r:
        assert len(r) == 1 and r[0].sequence == 2**64 - 1 and r.problems == []


def test_writer_rejects_bad_header_objects(tmp_path):
    p = tmp_path / "h.cap"
    with pytest.raises(CubecastError, match="sensor_toml must be a str"):
        CaptureWriter(p, b"bytes")
    with pytest.raises(CubecastError, match="metadata must be a dict"):
        CaptureWriter(p, SENSOR_TOML, metadata=[1])
    with pytest.raises(CubecastError, match="complex"):
        CaptureWriter(p, SENSOR_TOML, ground_truth={"amp": np.array([1 + 2j])})
    with pytest.raises(CubecastError, match="NaN"):
        CaptureWriter(p, SENSOR_TOML, ground_truth={"v": float("nan")})
    with pytest.raises(CubecastError, match="set"):
        CaptureWriter(p, SENSOR_TOML, ground_truth={1, 2})
    with pytest.raises(CubecastError, match="cannot create"):
        CaptureWriter(tmp_path / "no_such_dir" / "x.cap", SENSOR_TOML)


def test_reader_after_close(tmp_path):
    p = tmp_path / "c.cap"
    write_frames(p, small_frames(n=1))
    r = CaptureReader(p)
    r.close()
    r.close()
    assert r.closed
    with pytest.raises(CubecastError, match="closed"):
        r[0]


# ---- property test -----------------------------------------------------------------------------
_DTYPES = [np.dtype(d.newbyteorder("=")) for d in DTYPE_CODES.values()]


@st.composite
def frame_lists(draw):
    n = draw(st.integers(min_value=0, max_value=4))
    out = []
    for _ in range(n):
        dtype = draw(st.sampled_from(_DTYPES))
        shape = draw(hnp.array_shapes(min_dims=0, max_dims=4, min_side=0, max_side=5))
        arr = draw(hnp.arrays(dtype, shape))
        seq = draw(st.integers(min_value=0, max_value=2**64 - 1))
        ts = draw(st.floats(allow_nan=False, allow_infinity=False))
        out.append((arr, seq, ts))
    return out


@settings(max_examples=60, deadline=None)
@given(frames=frame_lists(), truth=st.recursive(
    st.none() | st.booleans() | st.integers(-2**53, 2**53) | st.text(max_size=8),
    lambda kids: st.lists(kids, max_size=3) | st.dictionaries(st.text(max_size=5), kids, max_size=3),
    max_leaves=8,
))
def test_property_round_trip(frames, truth):
    with tempfile.TemporaryDirectory() as d:
        p = os.path.join(d, "prop.cap")
        write_frames(p, frames, ground_truth=truth, metadata={"n": len(frames)})
        # expected reports, from the frames as written: a copy repeats every header field (the
        # timestamp's bits included) and the payload; any other frame whose sequence does not exceed
        # the last non-copy's is reported as not going forward
        seen, last, repeats, backwards = set(), None, [], 0
        for k, (arr, seq, ts) in enumerate(frames):
            key = (seq, struct.pack("<d", ts), np.dtype(arr.dtype).newbyteorder("<").str, arr.shape, arr.tobytes())
            if key in seen:
                repeats.append(k)
                continue
            seen.add(key)
            backwards += last is not None and seq <= last
            last = seq
        with CaptureReader(p) as r:
            assert r.counts == dict.fromkeys(r.counts, 0) | {"repeated": len(repeats), "sequence_backwards": backwards}
            assert len(r.problems) == len(repeats) + backwards
            assert [k for k in range(len(r)) if r.repeat_of(k) is not None] == repeats
            assert r.ground_truth == truth and r.metadata == {"n": len(frames)}
            assert len(r) == len(frames)
            for frame, (arr, seq, ts) in zip(r, frames):
                assert frame.sequence == seq and frame.timestamp_s == ts
                assert frame.payload.shape == arr.shape and frame.payload.dtype == arr.dtype
                assert frame.payload.tobytes() == arr.tobytes()  # bit-exact, NaN payloads included
            for k in reversed(range(len(frames))):
                assert r[k].payload.tobytes() == frames[k][0].tobytes()
