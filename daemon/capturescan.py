"""The record walk of a capture file (capture.py, README "Capture file format"): the record layout,
indexing the records after the file header, resynchronisation after damage, records whose length
is proven wrong, copies of records and sequences that do not go forward.  It reads through a
callable `read_at(offset, n) -> bytes`, so it knows nothing of how the file was opened.
"""

from __future__ import annotations

import math
import struct
import zlib
from typing import Callable, NamedTuple

import numpy as np

RECORD_MARKER = b"CCFR"
"""First 4 bytes of every frame record header."""

MAX_NDIM = 4
"""Largest number of payload dimensions a record can describe."""

# dtype code -> little-endian numpy dtype.  Codes are part of the file format: never renumber.
DTYPE_CODES: dict[int, np.dtype] = {
    1: np.dtype("<c8"),  # complex64: float32 real, float32 imaginary
    2: np.dtype("<i2"),  # int16 (I/Q pairs: trailing dimension of 2, I first)
    3: np.dtype("<f4"),  # float32
    4: np.dtype("u1"),  # uint8
    5: np.dtype("<f8"),  # float64
    6: np.dtype("<c16"),  # complex128
    7: np.dtype("<i4"),  # int32
    8: np.dtype("<u2"),  # uint16
}

U32 = struct.Struct("<I")
RECORD_BODY = struct.Struct("<4sQdBBH4IQI")  # everything but the trailing header CRC
RECORD = struct.Struct("<4sQdBBH4IQII")
RECORD_HEADER_SIZE = RECORD.size  # 56
"""Size in bytes of one frame record header."""

assert RECORD_BODY.size == 52 and RECORD_HEADER_SIZE == 56

COUNT_NAMES = ("lost_sync", "damaged", "unusable", "truncated_tail", "repeated", "sequence_backwards",
               "corrupt_skipped", "unindexed_bytes")
"""Keys of CaptureReader.counts (see there)."""

RESYNC_CHUNK_BYTES = 1 << 20


class Entry(NamedTuple):
    payload_offset: int
    sequence: int
    timestamp_s: float
    dtype: np.dtype
    shape: tuple[int, ...]
    nbytes: int
    payload_crc32: int


class Scanned(NamedTuple):
    """A record whose header validated, as the scan met it."""

    offset: int  # byte offset of its header
    entry: Entry  # (dtype None for an unknown code)
    index: int | None  # its frame index; None when it is not in the index


class RecordScan:
    """Index the records of one file: `walk(data_start)`, then `check_order(data_start)`.  Problems go
    to `problems` (lines) and `counts` (by reason, COUNT_NAMES), both shared with the caller."""

    def __init__(self, read_at: Callable[[int, int], bytes], size: int, problems: list[str],
                 counts: dict[str, int]) -> None:
        self._read_at = read_at
        self._size = size
        self.problems = problems
        self.counts = counts
        self.entries: list[Entry] = []
        self._keys: list[bytes] = []  # per entry: the header fields that make a copy a copy
        self.repeat_of: dict[int, int] = {}

    def note(self, reason: str, text: str) -> None:
        self.counts[reason] += 1
        self.problems.append(text)

    @staticmethod
    def _header_valid(hdr: bytes) -> bool:
        return (
            len(hdr) == RECORD_HEADER_SIZE
            and hdr[:4] == RECORD_MARKER
            and zlib.crc32(hdr[: RECORD_BODY.size]) == U32.unpack_from(hdr, RECORD_BODY.size)[0]
        )

    def _resync(self, start: int, stop: int | None = None) -> int | None:
        """Offset in start..stop-1 of the first record marker whose header CRC validates, or None."""
        stop = self._size if stop is None else min(stop, self._size)
        keep = len(RECORD_MARKER) - 1  # chunks overlap so that a marker across a boundary is seen
        pos = start
        while pos < stop:
            n = min(RESYNC_CHUNK_BYTES, stop - pos)  # candidates start in pos..pos+n-1
            buf = self._read_at(pos, n + keep)
            i = buf.find(RECORD_MARKER)
            while -1 < i < n:
                cand = pos + i
                if cand + RECORD_HEADER_SIZE > self._size:
                    return None
                if self._header_valid(self._read_at(cand, RECORD_HEADER_SIZE)):
                    return cand
                i = buf.find(RECORD_MARKER, i + 1)
            pos += n
        return None

    def _payload_crc(self, e: Entry) -> int:
        crc = 0
        for start in range(e.payload_offset, e.payload_offset + e.nbytes, RESYNC_CHUNK_BYTES):
            crc = zlib.crc32(self._read_at(start, min(RESYNC_CHUNK_BYTES, e.payload_offset + e.nbytes - start)), crc)
        return crc

    def _overlap(self, rec: Scanned, limit: int) -> int | None:
        """Offset of a valid record header inside `rec`'s declared payload (before `limit`) when that
        payload fails its CRC: proof that bytes were lost from `rec`. None otherwise (an intact
        payload is never searched: it may hold anything)."""
        if self._payload_crc(rec.entry) == rec.entry.payload_crc32:
            return None
        return self._resync(rec.entry.payload_offset, limit)

    def _drop_damaged(self, rec: Scanned, nxt: int, why: str) -> None:
        what = f"sequence {rec.entry.sequence}"
        if rec.index is not None:
            assert rec.index == len(self.entries) - 1
            self.entries.pop()
            self._keys.pop()
            what = f"frame index {rec.index}, {what}"
        self.note("damaged",
            f"record at byte offset {rec.offset} ({what}) is damaged: {why} and a valid record header starts at "
            f"byte offset {nxt}, inside the {rec.entry.nbytes} payload bytes it declares (bytes were lost from it); "
            f"dropped, frames after it are numbered from {len(self.entries)}")

    def walk(self, pos: int) -> None:
        """Walk the records from `pos`.  Before a discontinuity (a header that does not validate, a
        sequence other than the previous one's + 1, the end of the file) the previous record's
        payload CRC is checked: when it fails and a valid header starts inside its declared payload,
        bytes were deleted from it; it is dropped and the walk goes on from that header, so the
        record after a damaged one is not lost."""
        size = self._size
        prev: Scanned | None = None  # the record that ends at pos (the walk arrived by its length)
        while pos < size or prev is not None:
            hdr = self._read_at(pos, min(RECORD_HEADER_SIZE, size - pos)) if pos < size else b""
            valid = self._header_valid(hdr)
            if prev is not None and (not valid or RECORD.unpack(hdr)[1] != prev.entry.sequence + 1):
                nxt = self._overlap(prev, pos)
                if nxt is not None:
                    self._drop_damaged(prev, nxt, "its payload fails its CRC-32")
                    pos, prev = nxt, None
                    continue
            prev = None
            if pos >= size:
                return
            if valid:
                pos, prev = self._record(pos, hdr)
            else:
                pos = self._lost_sync(pos, hdr)

    def _lost_sync(self, pos: int, hdr: bytes) -> int:
        """Where to go on after the unreadable header at `pos` (the file size: nowhere)."""
        remaining = self._size - pos
        n = len(self.entries)
        if len(hdr) < RECORD_HEADER_SIZE:
            self.note("truncated_tail",
                f"truncated tail at byte offset {pos}: {remaining} bytes, less than a {RECORD_HEADER_SIZE}-byte "
                f"record header; frame index {n} is incomplete and was ignored")
            return self._size
        why = "record marker missing" if hdr[:4] != RECORD_MARKER else "header CRC-32 mismatch"
        nxt = self._resync(pos + 1)
        if nxt is None:
            self.note("lost_sync",
                f"corrupt record header at byte offset {pos} ({why}) where frame index {n} was expected; "
                f"no valid record header in the remaining {remaining} bytes, ignored to end of file")
            return self._size
        self.note("lost_sync",
            f"corrupt record header at byte offset {pos} ({why}) where frame index {n} was expected; "
            f"resynchronised at byte offset {nxt} ({nxt - pos} bytes skipped); frames after it are numbered from {n}")
        return nxt

    def _record(self, pos: int, hdr: bytes) -> tuple[int, Scanned | None]:
        """Index the record whose header at `pos` validated; (where the next one starts, the record)."""
        size = self._size
        entries = self.entries
        (_, seq, ts, code, ndim, _reserved, d0, d1, d2, d3, nbytes, pcrc, _hcrc) = RECORD.unpack(hdr)
        payload_offset = pos + RECORD_HEADER_SIZE
        end = payload_offset + nbytes
        dims = (d0, d1, d2, d3)
        dtype = DTYPE_CODES.get(code)
        entry = Entry(payload_offset, seq, ts, dtype, tuple(dims[: min(ndim, MAX_NDIM)]), nbytes, pcrc)
        if end > size:
            nxt = self._resync(payload_offset)
            if nxt is not None:
                self._drop_damaged(Scanned(pos, entry, None), nxt, f"its payload would end {end - size} bytes "
                                                                     "past the end of the file")
                return nxt, None
            self.note("truncated_tail",
                f"truncated tail at byte offset {pos}: payload of frame index {len(entries)} (sequence {seq}) "
                f"has {size - payload_offset} of {nbytes} bytes; the frame was ignored")
            return size, None
        bad = None
        if dtype is None:
            bad = f"unknown dtype code {code}"
        elif ndim > MAX_NDIM:
            bad = f"ndim {ndim} above {MAX_NDIM}"
        elif any(dims[ndim:]):
            bad = f"shape entries beyond ndim {ndim} are not zero: {dims}"
        elif math.prod(dims[:ndim]) * dtype.itemsize != nbytes:
            bad = f"payload byte count {nbytes} does not match shape {dims[:ndim]} x {dtype.itemsize} bytes"
        if bad is not None:
            self.note("unusable",
                f"record at byte offset {pos} (sequence {seq}) is unusable ({bad}); skipped, "
                f"frames after it are numbered from {len(entries)}")
            return end, Scanned(pos, entry, None)
        entries.append(entry)
        self._keys.append(hdr[4:22] + hdr[24:52])  # every field but the marker, reserved and header CRC
        return end, Scanned(pos, entry, len(entries) - 1)

    def check_order(self, data_start: int) -> None:
        """Repeated records and sequences that do not go forward; the byte count outside the index."""
        first: dict[bytes, int] = {}
        last_seq = None
        for i, (e, key) in enumerate(zip(self.entries, self._keys)):
            j = first.setdefault(key, i)
            if j != i:
                self.repeat_of[i] = j
                self.note("repeated",
                    f"frame index {i} (sequence {e.sequence}, byte offset {e.payload_offset - RECORD_HEADER_SIZE}) "
                    f"repeats frame index {j}: the same header fields and payload CRC-32, a copy of that record")
                continue
            if last_seq is not None and e.sequence <= last_seq:
                self.note("sequence_backwards",
                    f"frame index {i} (byte offset {e.payload_offset - RECORD_HEADER_SIZE}): sequence {e.sequence} "
                    f"is not after the previous frame's {last_seq} (a restarted source, or records out of order)")
            last_seq = e.sequence
        indexed = sum(RECORD_HEADER_SIZE + e.nbytes for e in self.entries)
        self.counts["unindexed_bytes"] = self._size - data_start - indexed
