"""Capture reader against damaged files: deleted and inserted bytes at every region of a record,
repeated records, sequences that go backwards, deeply nested JSON headers.

The reference in every test is outside the reader: the frames the test wrote and the byte range it
damaged (record boundaries found by walking the documented layout in tests/test_capture.py's
record_offsets). A frame whose bytes the damage does not touch must come back exactly; a touched
frame must never come back as valid data.
"""

from __future__ import annotations

import json
import struct
import zlib

import numpy as np
import pytest

from cubecast.daemon.capture import (COUNT_NAMES, MAGIC, MAX_JSON_DEPTH, RECORD_HEADER_SIZE, RECORD_MARKER,
                                     CaptureReader, CaptureWriter)
from cubecast.daemon.errors import CubecastError
from tests.test_capture import SENSOR_TOML, file_header_size, record_offsets, write_frames

N_FRAMES = 6
PAYLOAD_BYTES = 64  # int16 (16, 2)
RECORD_BYTES = RECORD_HEADER_SIZE + PAYLOAD_BYTES

# Offsets inside one record of each region of the documented record layout (README "Frame record"):
# the 56-byte header field by field, then the payload's first, a middle and its last byte.
# The format has no trailer: the header's own CRC is its last field.
REGIONS = {"marker": 0, "marker+2": 2, "sequence": 4, "sequence+5": 9, "timestamp_s": 12, "dtype_code": 20,
           "ndim": 21, "reserved": 22, "shape": 24, "shape+9": 33, "payload_nbytes": 40, "payload_crc32": 48,
           "header_crc32": 52, "header_crc32+3": 55, "payload start": 56, "payload middle": 56 + PAYLOAD_BYTES // 2,
           "payload end": RECORD_BYTES - 1}
DELETIONS = (1, 3, 40, 150)  # one byte, a few, and more than a whole record (reaching into the next)


def frames_written():
    rng = np.random.default_rng(11)
    return [(rng.integers(-30000, 30000, size=(16, 2)).astype(np.int16), 100 + k, 0.05 * k) for k in range(N_FRAMES)]


@pytest.fixture
def capture(tmp_path):
    p = tmp_path / "six.cap"
    frames = frames_written()
    write_frames(p, frames)
    offs = record_offsets(p)
    assert [b - a for a, b in zip(offs, offs[1:])] == [RECORD_BYTES] * (N_FRAMES - 1)
    return p.read_bytes(), frames, offs


def survivors(path):
    """(sequence, payload bytes) of every frame the reader hands out as valid, and the reader's counts."""
    with CaptureReader(path, skip_corrupt=True) as r:
        got = [(f.sequence, f.payload.tobytes()) for f in r]
        return got, r.counts, r.problems, len(r)


def touched(offs, size, a, b):
    """Indexes of the records whose bytes intersect [a, b) (an insertion point: a == b, inside a record)."""
    spans = [(s, e) for s, e in zip(offs, offs[1:] + [size])]
    if a == b:
        return {k for k, (s, e) in enumerate(spans) if s < a < e}
    return {k for k, (s, e) in enumerate(spans) if a < e and b > s}


def rightmost(data: bytes, a: int, b: int) -> tuple[int, int]:
    """Deleting [a, b) gives the same file as deleting [a + 1, b + 1) when data[a] == data[b]: the
    damage is the rightmost such range (a reader walking forward keeps the earlier bytes)."""
    while b < len(data) and data[a] == data[b]:
        a, b = a + 1, b + 1
    return a, b


def rightmost_insertion(data: bytes, a: int, junk: bytes) -> tuple[int, bytes]:
    """Inserting junk at a equals inserting junk[1:] + junk[:1] at a + 1 when junk[0] == data[a]."""
    while a < len(data) and junk[0] == data[a]:
        a, junk = a + 1, junk[1:] + junk[:1]
    return a, junk


def expected_deletion_counts(offs, size, a, b):
    """What the reader documents for bytes [a, b) deleted from record k, the one holding byte a:

    - damage starting in k's header: that header no longer validates and the reader searches forward
      for the next valid one (one lost_sync), or, at the end of the file with less than a header
      left, a truncated tail (nothing, when the file now ends where record k started);
    - damage inside k's payload only: k's header still validates, its payload fails its CRC and the
      next record's header now starts inside the payload k declares: k is dropped (damaged);
    - damage from k's payload into the next record: if the first untouched record now starts inside
      k's declared payload, k is dropped (damaged); otherwise k keeps its declared length (its
      payload fails its CRC when read: corrupt_skipped) and the reader searches forward from where k
      ends (lost_sync) - or, when nothing follows, reports a truncated tail;
    - the last record's payload: the declared payload runs past the end of the file with no header
      after it: a truncated tail.
    """
    k = max(j for j, s in enumerate(offs) if s <= a)
    off = a - offs[k]
    new_size = size - (b - a)
    counts = dict.fromkeys(COUNT_NAMES, 0)
    nxt = [s - (b - a) for s in offs if s >= b]  # untouched records, where they now start
    declared_end = offs[k] + RECORD_BYTES
    if off < RECORD_HEADER_SIZE:
        if new_size > offs[k]:  # (else the file now ends exactly after record k - 1: a shorter valid file)
            counts["lost_sync" if new_size - offs[k] >= RECORD_HEADER_SIZE else "truncated_tail"] = 1
    elif nxt and nxt[0] < declared_end:
        counts["damaged"] = 1
    elif declared_end > new_size:
        counts["truncated_tail"] = 1
    else:
        counts["corrupt_skipped"] = 1
        counts["lost_sync" if new_size - declared_end >= RECORD_HEADER_SIZE else "truncated_tail"] = 1
    return counts


@pytest.mark.parametrize("k", [0, 2, N_FRAMES - 1])
@pytest.mark.parametrize("region", list(REGIONS))
@pytest.mark.parametrize("n", DELETIONS)
def test_deleted_bytes_lose_only_the_records_they_touch(capture, tmp_path, k, region, n):
    data, frames, offs = capture
    a, b = rightmost(data, offs[k] + REGIONS[region], min(offs[k] + REGIONS[region] + n, len(data)))
    bad = tmp_path / "deleted.cap"
    bad.write_bytes(data[:a] + data[b:])
    lost = touched(offs, len(data), a, b)
    got, counts, problems, indexed = survivors(bad)
    assert got == [(seq, arr.tobytes()) for j, (arr, seq, _) in enumerate(frames) if j not in lost]
    expect = expected_deletion_counts(offs, len(data), a, b)
    # every byte after the file header is in an indexed record or counted outside the index
    expect["unindexed_bytes"] = len(data) - (b - a) - offs[0] - indexed * RECORD_BYTES
    assert counts == expect, problems
    assert len(problems) == sum(v for name, v in counts.items() if name != "unindexed_bytes")


@pytest.mark.parametrize("region", ["marker", "sequence", "payload_nbytes", "header_crc32+3", "payload start",
                                    "payload middle", "payload end"])
@pytest.mark.parametrize("n", (1, 20, 100))
def test_inserted_bytes_lose_only_the_record_they_land_in(capture, tmp_path, region, n):
    data, frames, offs = capture
    k = 2
    junk = np.random.default_rng(n).integers(0, 256, n, dtype=np.uint8).tobytes()
    a, junk = rightmost_insertion(data, offs[k] + REGIONS[region], junk)
    assert RECORD_MARKER not in junk and offs[k] <= a < offs[k + 1]
    bad = tmp_path / "inserted.cap"
    bad.write_bytes(data[:a] + junk + data[a:])
    lost = touched(offs, len(data), a, a)  # bytes inserted before a record's marker touch no record
    got, counts, problems, indexed = survivors(bad)
    assert got == [(seq, arr.tobytes()) for j, (arr, seq, _) in enumerate(frames) if j not in lost]
    # the walk meets bytes that are no header: one forward search; a record grown inside its payload
    # keeps its declared length and fails its CRC when read
    expect = dict.fromkeys(COUNT_NAMES, 0) | {"lost_sync": 1}
    expect["corrupt_skipped"] = int(REGIONS[region] >= RECORD_HEADER_SIZE)
    expect["unindexed_bytes"] = len(data) + n - offs[0] - indexed * RECORD_BYTES
    assert counts == expect, problems


@pytest.mark.parametrize("big, cut_records", [(1, 1), (2, 3)])
def test_deletion_as_long_as_whole_records_after_it(tmp_path, big, cut_records):
    """Bytes deleted inside a long payload, exactly as many as the next record(s) take: the walk lands
    on a valid header further on (a sequence jump, or exactly the end of the file), checks the
    payload before it, finds the hidden record and recovers it; only the damaged frame is lost."""
    rng = np.random.default_rng(5)
    frames = [(rng.integers(0, 255, 512 if k == big else PAYLOAD_BYTES).astype(np.uint8), 100 + k, 0.1 * k)
              for k in range(N_FRAMES)]
    p = tmp_path / "long.cap"
    write_frames(p, frames)
    data, offs = p.read_bytes(), record_offsets(p)
    ends = offs[1:] + [len(data)]
    n = ends[big + cut_records] - offs[big + 1]  # the length of the cut_records records after `big`
    a = offs[big] + RECORD_HEADER_SIZE + 100
    assert a + n < ends[big]  # all deleted bytes lie inside the long payload
    assert (big + cut_records == N_FRAMES - 1) == (cut_records == 3)  # the second case: to the end exactly
    bad = tmp_path / "cut.cap"
    bad.write_bytes(data[:a] + data[a + n:])
    got, counts, problems, _ = survivors(bad)
    assert got == [(seq, arr.tobytes()) for j, (arr, seq, _) in enumerate(frames) if j != big]
    assert counts["damaged"] == 1 and sum(v for name, v in counts.items() if name != "unindexed_bytes") == 1, problems


# ---- repeated records and sequences ------------------------------------------------------------
def test_appended_copy_is_reported_as_repeated_and_can_be_skipped(capture, tmp_path):
    data, frames, offs = capture
    bad = tmp_path / "dup.cap"
    bad.write_bytes(data + data[offs[-1]:])
    with CaptureReader(bad) as r:
        assert len(r) == N_FRAMES + 1  # the index keeps it: frame indexes stay those of the file
        assert r.repeat_of(N_FRAMES) == N_FRAMES - 1 and r.repeat_of(-1) == N_FRAMES - 1
        assert [r.repeat_of(j) for j in range(N_FRAMES)] == [None] * N_FRAMES
        assert r.counts == dict.fromkeys(COUNT_NAMES, 0) | {"repeated": 1}
        assert len(r.problems) == 1 and f"frame index {N_FRAMES} " in r.problems[0]
        assert f"repeats frame index {N_FRAMES - 1}" in r.problems[0]
    with CaptureReader(bad, skip_repeated=True) as r:
        assert [f.sequence for f in r] == [100 + j for j in range(N_FRAMES)]
    # a copy in the middle of the file is a repeat too, not a sequence going backwards
    bad.write_bytes(data[: offs[4]] + data[offs[1]: offs[2]] + data[offs[4]:])
    with CaptureReader(bad, skip_repeated=True) as r:
        assert r.counts["repeated"] == 1 and r.counts["sequence_backwards"] == 0
        assert r.repeat_of(4) == 1 and [f.sequence for f in r] == [100 + j for j in range(N_FRAMES)]


def test_sequence_going_backwards_is_reported_and_read(tmp_path):
    p = tmp_path / "back.cap"
    rng = np.random.default_rng(3)
    seqs = [5, 6, 7, 0, 1, 1, 2]  # a restart at 0 (as a recorder writes a restarted source), then 1 twice
    write_frames(p, [(rng.integers(0, 255, 8).astype(np.uint8), s, 0.1 * j) for j, s in enumerate(seqs)])
    with CaptureReader(p) as r:
        assert [f.sequence for f in r] == seqs
        assert r.counts == dict.fromkeys(COUNT_NAMES, 0) | {"sequence_backwards": 2}
        assert "frame index 3" in r.problems[0] and "sequence 0 is not after the previous frame's 7" in r.problems[0]
        assert "frame index 5" in r.problems[1] and [r.repeat_of(j) for j in range(len(r))] == [None] * len(seqs)


# ---- JSON header nesting -----------------------------------------------------------------------
def file_with_json(path, text: bytes) -> None:
    path.write_bytes(MAGIC + struct.pack("<HI", 1, len(text)) + text + struct.pack("<I", zlib.crc32(text)))


@pytest.mark.parametrize("depth", [MAX_JSON_DEPTH, MAX_JSON_DEPTH + 1, 100_000])
def test_json_header_nesting_is_bounded(tmp_path, depth):
    p = tmp_path / "deep.cap"
    inner = depth - 1  # the header object itself is the first level
    text = b'{"sensor_toml":"a = 1\\n","created_utc":"x","ground_truth":' + b"[" * inner + b"]" * inner + b"}"
    file_with_json(p, text)
    if depth <= MAX_JSON_DEPTH:
        with CaptureReader(p) as r:
            truth = r.ground_truth
            for _ in range(inner - 1):
                truth = truth[0]
            assert truth == []
        return
    with pytest.raises(CubecastError) as info:
        CaptureReader(p)
    assert f"{depth} levels deep" in str(info.value) and f"at most {MAX_JSON_DEPTH}" in str(info.value)
    assert str(p) in str(info.value)


def test_brackets_inside_json_strings_are_not_nesting(tmp_path):
    p = tmp_path / "strings.cap"
    deep_text = "[" * 500 + '\\"{' * 100 + "]" * 500
    header = {"sensor_toml": deep_text, "created_utc": "x", "metadata": {"note": "}]" * 300}}
    file_with_json(p, json.dumps(header).encode())
    with CaptureReader(p) as r:
        assert r.sensor_toml == deep_text and r.metadata == {"note": "}]" * 300}


def test_writer_refuses_what_the_reader_would_refuse(tmp_path):
    p = tmp_path / "w.cap"
    ok = []  # lists nested MAX_JSON_DEPTH - 1 deep: with the header object, exactly the limit
    for _ in range(MAX_JSON_DEPTH - 2):
        ok = [ok]
    CaptureWriter(p, SENSOR_TOML, ground_truth=ok).close()
    with CaptureReader(p) as r:
        assert r.problems == []
    for extra in (1, 5000):  # one level too many; deeper than Python's own recursion limit
        deep = ok
        for _ in range(extra):
            deep = [deep]
        with pytest.raises(CubecastError, match="nest"):
            CaptureWriter(p, SENSOR_TOML, ground_truth=deep)
