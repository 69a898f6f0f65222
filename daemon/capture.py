"""Capture files: cubecast's own binary container for recorded or simulated ADC frames.

Layout (all integers little-endian; full specification in the README section "Capture file format"):

    file header   magic b"CUBECAST" | version u16 | json_len u32 | JSON (UTF-8) | crc32(JSON) u32
    frame record  56-byte record header | payload (C order, little-endian)   ... repeated

Record header (56 bytes):

    off  size  field
      0     4  marker b"CCFR"
      4     8  sequence         u64
     12     8  timestamp_s      f64
     20     1  dtype code       u8   (see DTYPE_CODES)
     21     1  ndim             u8   (0..4)
     22     2  reserved         u16  (write 0, readers ignore)
     24    16  shape            4 x u32 (unused trailing entries are 0)
     40     8  payload_nbytes   u64  (= prod(shape) * itemsize)
     48     4  payload_crc32    u32
     52     4  header_crc32     u32  (CRC-32 of bytes 0..51 of this header)

The CRC is the common CRC-32 of zlib.crc32 (reflected polynomial 0xEDB88320, init and final XOR
0xFFFFFFFF; check value of b"123456789" is 0xCBF43926).

Both classes stream: the writer appends and flushes one frame at a time, the reader indexes record
headers on open (seeking over payloads; it reads a payload only to check the record before a
discontinuity and the last record) and reads one payload per request with one seek and one
readinto.  Neither is thread-safe; use one object per thread.
"""

from __future__ import annotations

import datetime as _dt
import io
import json
import math
import operator
import os
import re
import struct
import zlib
from typing import Any, Iterator, NamedTuple

import numpy as np

from .errors import CubecastError

__all__ = [
    "MAGIC",
    "FORMAT_VERSION",
    "RECORD_MARKER",
    "RECORD_HEADER_SIZE",
    "MAX_NDIM",
    "DTYPE_CODES",
    "CaptureFrame",
    "CaptureWriter",
    "CaptureReader",
    "FrameIndexError",
    "CorruptFrameError",
    "COUNT_NAMES",
    "MAX_JSON_DEPTH",
]

MAGIC = b"CUBECAST"
"""First 8 bytes of every capture file."""

FORMAT_VERSION = 1
"""The only format version this module writes and reads."""

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

_FILE_PREFIX = struct.Struct("<8sHI")  # magic, version, json_len
_U32 = struct.Struct("<I")
_RECORD_BODY = struct.Struct("<4sQdBBH4IQI")  # everything but the trailing header CRC
_RECORD = struct.Struct("<4sQdBBH4IQII")
RECORD_HEADER_SIZE = _RECORD.size  # 56
"""Size in bytes of one frame record header."""

assert _RECORD_BODY.size == 52 and RECORD_HEADER_SIZE == 56 and _FILE_PREFIX.size == 14

MAX_JSON_DEPTH = 64
"""Deepest nesting of arrays and objects the JSON header may have (writer and reader refuse more)."""

COUNT_NAMES = ("lost_sync", "damaged", "unusable", "truncated_tail", "repeated", "sequence_backwards",
               "corrupt_skipped", "unindexed_bytes")
"""Keys of CaptureReader.counts (see there)."""

_U32_MAX = 0xFFFFFFFF
_U64_MAX = 0xFFFFFFFFFFFFFFFF
_RESYNC_CHUNK_BYTES = 1 << 20


class CaptureFrame(NamedTuple):
    """One frame read back from a capture file."""

    index: int  # position among the readable frames of this file (0-based)
    sequence: int  # sequence number stored by the writer
    timestamp_s: float  # timestamp stored by the writer, seconds
    payload: np.ndarray  # C-contiguous, little-endian, shape and dtype as written


class FrameIndexError(CubecastError, IndexError):
    """A frame index outside 0..len(reader)-1 (negative indexes count from the end)."""


class CorruptFrameError(CubecastError):
    """A frame whose payload CRC-32 does not match; `index` is the frame index, `path` the file."""

    def __init__(self, message: str, index: int, path: str) -> None:
        super().__init__(message)
        self.index = index
        self.path = path


class _Entry(NamedTuple):
    payload_offset: int
    sequence: int
    timestamp_s: float
    dtype: np.dtype
    shape: tuple[int, ...]
    nbytes: int
    payload_crc32: int


class _Scanned(NamedTuple):
    """A record whose header validated, as the scan met it."""

    offset: int  # byte offset of its header
    entry: _Entry  # (dtype None for an unknown code)
    index: int | None  # its frame index; None when it is not in the index


def _dtype_code(dtype: np.dtype) -> int | None:
    """Format code of a numpy dtype (any byte order), or None if the format cannot store it."""
    for code, stored in DTYPE_CODES.items():
        if dtype.kind == stored.kind and dtype.itemsize == stored.itemsize:
            return code
    return None


def _supported_dtype_names() -> str:
    return ", ".join(str(np.dtype(d.newbyteorder("="))) for d in DTYPE_CODES.values())


def _json_default(obj: Any) -> Any:
    """json.dumps hook: numpy arrays -> nested lists, numpy scalars -> Python scalars."""
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, complex):
        raise TypeError("a complex value (JSON has no complex numbers; store real and imaginary parts separately)")
    raise TypeError(f"a value of type {type(obj).__name__}")


_JSON_STRING = re.compile(rb'"[^"\\]*(?:\\.[^"\\]*)*"')


def _json_depth(data: bytes) -> int:
    """Deepest nesting of arrays and objects in JSON text (brackets inside strings do not count)."""
    bare = np.frombuffer(_JSON_STRING.sub(b"", data), np.uint8)
    step = np.isin(bare, (0x5B, 0x7B)).astype(np.int64) - np.isin(bare, (0x5D, 0x7D))
    return int(np.cumsum(step).max(initial=0))


def _encode_json_header(sensor_toml: Any, ground_truth: Any, metadata: Any, created_utc: str | None = None) -> bytes:
    if not isinstance(sensor_toml, str):
        raise CubecastError(f"capture: sensor_toml must be a str (the sensor description text), got {type(sensor_toml).__name__}")
    if metadata is not None and not isinstance(metadata, dict):
        raise CubecastError(f"capture: metadata must be a dict or None, got {type(metadata).__name__}")
    obj = {
        "sensor_toml": sensor_toml,
        "created_utc": created_utc or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds"),
        "ground_truth": ground_truth,
        "metadata": {} if metadata is None else metadata,
    }
    try:
        text = json.dumps(obj, default=_json_default, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    except RecursionError:
        raise CubecastError(f"capture: ground_truth/metadata nest deeper than the JSON header allows "
                            f"({MAX_JSON_DEPTH} levels)") from None
    except TypeError as exc:
        raise CubecastError(f"capture: ground_truth/metadata cannot be stored as JSON: {exc}") from None
    except ValueError as exc:
        raise CubecastError(
            f"capture: ground_truth/metadata cannot be stored as JSON ({exc}); NaN and infinity are not JSON, "
            "use null instead"
        ) from None
    data = text.encode("utf-8")
    depth = _json_depth(data)
    if depth > MAX_JSON_DEPTH:
        raise CubecastError(f"capture: ground_truth/metadata nest {depth} levels deep (the header object counts "
                            f"as one); the JSON header allows at most {MAX_JSON_DEPTH}")
    if len(data) > _U32_MAX:
        raise CubecastError(f"capture: JSON header is {len(data)} bytes, the format allows at most {_U32_MAX}")
    return data


class CaptureWriter:
    """Write a capture file frame by frame.

    CaptureWriter(path, sensor_toml, ground_truth=None, metadata=None, *, fsync=False, created_utc=None)

    `created_utc` (an ISO 8601 string) defaults to now; a simulator passes a fixed one so that the
    same scene, sensor and seed give the same file byte for byte.

    The file header is written (and flushed) on construction; an existing file at `path` is
    replaced.  `ground_truth` may be any JSON-able object; numpy arrays inside it are stored as
    nested lists and numpy scalars as Python numbers (so they read back as lists/numbers, tuples
    read back as lists and non-string dict keys as strings).  Complex numbers, NaN and infinity
    cannot be stored (CubecastError).  `metadata` must be a dict or None (stored as {}).

    Every `write` flushes the frame to the operating system, so a crash of this process loses at
    most the frame being written; with fsync=True each frame is also forced to disk (slower, but
    survives a power cut).  After a failed write the writer refuses further frames.
    """

    def __init__(self, path: str | os.PathLike, sensor_toml: str, ground_truth: Any = None,
                 metadata: dict | None = None, *, fsync: bool = False, created_utc: str | None = None) -> None:
        self._path = os.fspath(path)
        self._fsync = bool(fsync)
        self._frames_written = 0
        self._broken = False
        self._file: io.BufferedWriter | None = None
        json_bytes = _encode_json_header(sensor_toml, ground_truth, metadata, created_utc)
        try:
            self._file = open(self._path, "wb")
        except OSError as exc:
            raise CubecastError(f"capture {self._path!r}: cannot create file: {exc.strerror or exc}") from None
        self._write_parts([
            _FILE_PREFIX.pack(MAGIC, FORMAT_VERSION, len(json_bytes)),
            json_bytes,
            _U32.pack(zlib.crc32(json_bytes)),
        ])

    @property
    def path(self) -> str:
        return self._path

    @property
    def frames_written(self) -> int:
        return self._frames_written

    @property
    def closed(self) -> bool:
        return self._file is None

    def _write_parts(self, parts: list) -> None:
        assert self._file is not None
        try:
            for part in parts:
                self._file.write(part)
            self._file.flush()
            if self._fsync:
                os.fsync(self._file.fileno())
        except OSError as exc:
            self._broken = True
            raise CubecastError(f"capture {self._path!r}: write failed: {exc.strerror or exc}") from None

    def write(self, payload: np.ndarray, sequence: int, timestamp_s: float) -> int:
        """Append one frame; returns its frame index.  The frame is flushed before returning.

        payload: numpy array of a dtype in DTYPE_CODES (complex64, int16, float32, uint8, float64,
        complex128, int32, uint16; any byte order, any strides: stored C order little-endian), at
        most 4 dimensions, each at most 2**32-1.  Int16 I/Q data: int16 array with trailing dim 2.
        sequence: integer 0..2**64-1.  timestamp_s: finite float, seconds.
        """
        if self._file is None:
            raise CubecastError(f"capture {self._path!r}: write after close")
        if self._broken:
            raise CubecastError(f"capture {self._path!r}: an earlier write failed; the writer accepts no more frames")
        if not isinstance(payload, np.ndarray):
            raise CubecastError(f"capture {self._path!r}: payload must be a numpy array, got {type(payload).__name__}")
        code = _dtype_code(payload.dtype)
        if code is None:
            raise CubecastError(
                f"capture {self._path!r}: payload dtype {payload.dtype} is not supported "
                f"(supported: {_supported_dtype_names()})"
            )
        shape = payload.shape
        if len(shape) > MAX_NDIM:
            raise CubecastError(f"capture {self._path!r}: payload has ndim {len(shape)}, at most {MAX_NDIM} allowed")
        if any(d > _U32_MAX for d in shape):
            raise CubecastError(f"capture {self._path!r}: payload shape {shape} has a dimension above {_U32_MAX}")
        if isinstance(sequence, bool):
            raise CubecastError(f"capture {self._path!r}: sequence must be an integer, got bool")
        try:
            seq = operator.index(sequence)
        except TypeError:
            raise CubecastError(f"capture {self._path!r}: sequence must be an integer, got {type(sequence).__name__}") from None
        if not 0 <= seq <= _U64_MAX:
            raise CubecastError(f"capture {self._path!r}: sequence {seq} outside 0..2**64-1")
        try:
            ts = float(timestamp_s)
        except (TypeError, ValueError):
            raise CubecastError(f"capture {self._path!r}: timestamp_s must be a number, got {timestamp_s!r}") from None
        if not math.isfinite(ts):
            raise CubecastError(f"capture {self._path!r}: timestamp_s must be finite, got {ts}")

        stored = DTYPE_CODES[code]
        data = np.ascontiguousarray(payload, dtype=stored)  # no copy when already C order little-endian
        raw = data.reshape(-1).view(np.uint8)
        dims = list(shape) + [0] * (MAX_NDIM - len(shape))
        body = _RECORD_BODY.pack(RECORD_MARKER, seq, ts, code, len(shape), 0, *dims, raw.nbytes, zlib.crc32(raw))
        self._write_parts([body, _U32.pack(zlib.crc32(body)), raw])
        self._frames_written += 1
        return self._frames_written - 1

    def close(self) -> None:
        """Flush and close; safe to call more than once."""
        if self._file is not None:
            f, self._file = self._file, None
            try:
                f.close()
            except OSError as exc:
                raise CubecastError(f"capture {self._path!r}: close failed: {exc.strerror or exc}") from None

    def __enter__(self) -> "CaptureWriter":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


class CaptureReader:
    """Read a capture file with O(1) random access to its frames.

    CaptureReader(path, skip_corrupt=False, skip_repeated=False)

    Opening reads the file header and scans the record headers (seeking over payloads) to index
    the frames.  Problems found while scanning are listed in `problems` instead of raising, and
    counted in `counts` (one reason per line):

    - `truncated_tail`: the file is cut inside a record header or payload; the incomplete record
      is not a frame, the complete frames before it read normally;
    - `lost_sync`: a record header whose own CRC fails (or lacks its marker): the reader scans
      forward byte by byte for the next record marker whose header CRC validates and continues
      from there.  The record(s) in the skipped span are lost, and the frames after it are
      numbered consecutively (frame indexes count readable frames; `sequence` keeps the writer's
      numbering);
    - `damaged`: a record with a valid header whose declared length is proven wrong: its payload
      fails its CRC and a valid record header starts inside the payload it declares (bytes were
      deleted from it), or its payload would run past the end of the file while a valid header
      follows.  It is dropped and the walk goes on from that header, so only the damaged record
      is lost.  The payload is checked only where the walk meets a discontinuity (a header that
      does not validate, a sequence other than the previous + 1, the end of the file);
    - `unusable`: a record header with a valid CRC that this reader cannot use (unknown dtype
      code, bad ndim, byte count not matching the shape): skipped exactly, using its byte count;
    - `repeated`: a frame whose header fields and payload CRC equal an earlier frame's (a copy of
      that record).  It stays in the index; `repeat_of(i)` names the original, and iteration with
      skip_repeated=True passes over it;
    - `sequence_backwards`: a frame (not a copy) whose sequence is not after the previous
      frame's; it is read normally (a recorder writes a restarted source's frames from 0 again).

    `counts["unindexed_bytes"]` is the number of bytes after the file header that belong to no
    indexed frame (0 for an undamaged file).

    A bad magic, an unknown version or a corrupt/truncated JSON header raises CubecastError.

    A payload whose CRC fails raises CorruptFrameError (a CubecastError naming the frame index and
    the file) when that frame is read.  With skip_corrupt=True, iteration skips such frames and records each skip in
    `problems` (counted as `corrupt_skipped`); random access (`reader[i]`, `read`, `read_into`) always raises.
    """

    def __init__(self, path: str | os.PathLike, skip_corrupt: bool = False, skip_repeated: bool = False) -> None:
        self._path = os.fspath(path)
        self._skip_corrupt = bool(skip_corrupt)
        self._skip_repeated = bool(skip_repeated)
        self._problems: list[str] = []
        self._counts: dict[str, int] = dict.fromkeys(COUNT_NAMES, 0)
        self._reported_corrupt: set[int] = set()
        self._entries: list[_Entry] = []
        self._keys: list[bytes] = []  # per entry: the header fields that make a copy a copy
        self._repeat_of: dict[int, int] = {}
        try:
            self._file: io.FileIO | None = open(self._path, "rb", buffering=0)
        except OSError as exc:
            raise CubecastError(f"capture {self._path!r}: cannot open: {exc.strerror or exc}") from None
        try:
            self._size = os.fstat(self._file.fileno()).st_size
            data_start = self._read_file_header()
            self._scan(data_start)
            self._check_order(data_start)
        except BaseException:
            self._file.close()
            self._file = None
            raise

    # ---- file header -------------------------------------------------------------------------
    def _fail(self, what: str) -> CubecastError:
        return CubecastError(f"capture {self._path!r}: {what}")

    def _read_exact_at(self, offset: int, n: int) -> bytes:
        assert self._file is not None
        self._file.seek(offset)
        chunks = []
        got = 0
        while got < n:
            chunk = self._file.read(n - got)
            if not chunk:
                break
            chunks.append(chunk)
            got += len(chunk)
        return b"".join(chunks)

    def _read_file_header(self) -> int:
        prefix = self._read_exact_at(0, _FILE_PREFIX.size)
        if len(prefix) < len(MAGIC) and MAGIC.startswith(prefix):
            raise self._fail(f"file truncated: {len(prefix)} bytes, shorter than the {len(MAGIC)}-byte magic")
        if prefix[: len(MAGIC)] != MAGIC:
            shown = prefix[: len(MAGIC)]
            raise self._fail(f"not a cubecast capture file: bad magic {shown!r} (expected {MAGIC!r})")
        if len(prefix) < _FILE_PREFIX.size:
            raise self._fail(f"file header truncated: {self._size} bytes, the fixed part needs {_FILE_PREFIX.size}")
        _, version, json_len = _FILE_PREFIX.unpack(prefix)
        if version != FORMAT_VERSION:
            raise self._fail(f"unknown capture format version {version} (this reader supports version {FORMAT_VERSION})")
        json_end = _FILE_PREFIX.size + json_len
        if json_end + 4 > self._size:
            raise self._fail(
                f"JSON header truncated or its length corrupt: header declares {json_len} JSON bytes + 4 CRC bytes, "
                f"only {self._size - _FILE_PREFIX.size} bytes follow the fixed header"
            )
        json_bytes = self._read_exact_at(_FILE_PREFIX.size, json_len + 4)
        (stored_crc,) = _U32.unpack_from(json_bytes, json_len)
        json_bytes = json_bytes[:json_len]
        crc = zlib.crc32(json_bytes)
        if crc != stored_crc:
            raise self._fail(f"JSON header corrupt: CRC-32 mismatch (stored 0x{stored_crc:08X}, computed 0x{crc:08X})")
        try:
            text = json_bytes.decode("utf-8")
            depth = _json_depth(json_bytes)
            if depth > MAX_JSON_DEPTH:
                raise self._fail(f"JSON header nests arrays/objects {depth} levels deep; at most {MAX_JSON_DEPTH} "
                                 "allowed")
            header = json.loads(text)
        except (UnicodeDecodeError, ValueError) as exc:
            raise self._fail(f"JSON header is not valid UTF-8 JSON: {exc}") from None
        except RecursionError:  # not reached within MAX_JSON_DEPTH, unless called from deep inside a stack
            raise self._fail(f"JSON header nests too deep to parse (at most {MAX_JSON_DEPTH} levels allowed)") from None
        if not isinstance(header, dict):
            raise self._fail(f"JSON header must be a JSON object, got {type(header).__name__}")
        sensor_toml = header.get("sensor_toml")
        if not isinstance(sensor_toml, str):
            raise self._fail("JSON header field 'sensor_toml' is missing or not a string")
        metadata = header.get("metadata")
        if metadata is None:
            metadata = {}
        if not isinstance(metadata, dict):
            raise self._fail(f"JSON header field 'metadata' must be an object, got {type(metadata).__name__}")
        created = header.get("created_utc")
        if not isinstance(created, str):
            self._problems.append("JSON header field 'created_utc' is missing or not a string")
            created = None
        self._version = version
        self._sensor_toml = sensor_toml
        self._ground_truth = header.get("ground_truth")
        self._metadata = metadata
        self._created_utc = created
        return json_end + 4

    # ---- record scan -------------------------------------------------------------------------
    def _note(self, reason: str, text: str) -> None:
        self._counts[reason] += 1
        self._problems.append(text)

    @staticmethod
    def _header_valid(hdr: bytes) -> bool:
        return (
            len(hdr) == RECORD_HEADER_SIZE
            and hdr[:4] == RECORD_MARKER
            and zlib.crc32(hdr[: _RECORD_BODY.size]) == _U32.unpack_from(hdr, _RECORD_BODY.size)[0]
        )

    def _resync(self, start: int, stop: int | None = None) -> int | None:
        """Offset in start..stop-1 of the first record marker whose header CRC validates, or None."""
        assert self._file is not None
        stop = self._size if stop is None else min(stop, self._size)
        keep = len(RECORD_MARKER) - 1  # chunks overlap so that a marker across a boundary is seen
        pos = start
        while pos < stop:
            n = min(_RESYNC_CHUNK_BYTES, stop - pos)  # candidates start in pos..pos+n-1
            buf = self._read_exact_at(pos, n + keep)
            i = buf.find(RECORD_MARKER)
            while -1 < i < n:
                cand = pos + i
                if cand + RECORD_HEADER_SIZE > self._size:
                    return None
                if self._header_valid(self._read_exact_at(cand, RECORD_HEADER_SIZE)):
                    return cand
                i = buf.find(RECORD_MARKER, i + 1)
            pos += n
        return None

    def _payload_crc(self, e: _Entry) -> int:
        crc = 0
        for start in range(e.payload_offset, e.payload_offset + e.nbytes, _RESYNC_CHUNK_BYTES):
            crc = zlib.crc32(self._read_exact_at(start, min(_RESYNC_CHUNK_BYTES, e.payload_offset + e.nbytes - start)), crc)
        return crc

    def _overlap(self, rec: _Scanned, limit: int) -> int | None:
        """Offset of a valid record header inside `rec`'s declared payload (before `limit`) when that
        payload fails its CRC: proof that bytes were lost from `rec`. None otherwise (an intact
        payload is never searched: it may hold anything)."""
        if self._payload_crc(rec.entry) == rec.entry.payload_crc32:
            return None
        return self._resync(rec.entry.payload_offset, limit)

    def _drop_damaged(self, rec: _Scanned, nxt: int, why: str) -> None:
        what = f"sequence {rec.entry.sequence}"
        if rec.index is not None:
            assert rec.index == len(self._entries) - 1
            self._entries.pop()
            self._keys.pop()
            what = f"frame index {rec.index}, {what}"
        self._note("damaged",
            f"record at byte offset {rec.offset} ({what}) is damaged: {why} and a valid record header starts at "
            f"byte offset {nxt}, inside the {rec.entry.nbytes} payload bytes it declares (bytes were lost from it); "
            f"dropped, frames after it are numbered from {len(self._entries)}")

    def _scan(self, pos: int) -> None:
        """Walk the records from `pos`.  Before a discontinuity (a header that does not validate, a
        sequence other than the previous one's + 1, the end of the file) the previous record's
        payload CRC is checked: when it fails and a valid header starts inside its declared payload,
        bytes were deleted from it; it is dropped and the walk goes on from that header, so the
        record after a damaged one is not lost."""
        size = self._size
        prev: _Scanned | None = None  # the record that ends at pos (the walk arrived by its length)
        while pos < size or prev is not None:
            hdr = self._read_exact_at(pos, min(RECORD_HEADER_SIZE, size - pos)) if pos < size else b""
            valid = self._header_valid(hdr)
            if prev is not None and (not valid or _RECORD.unpack(hdr)[1] != prev.entry.sequence + 1):
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
        n = len(self._entries)
        if len(hdr) < RECORD_HEADER_SIZE:
            self._note("truncated_tail",
                f"truncated tail at byte offset {pos}: {remaining} bytes, less than a {RECORD_HEADER_SIZE}-byte "
                f"record header; frame index {n} is incomplete and was ignored")
            return self._size
        why = "record marker missing" if hdr[:4] != RECORD_MARKER else "header CRC-32 mismatch"
        nxt = self._resync(pos + 1)
        if nxt is None:
            self._note("lost_sync",
                f"corrupt record header at byte offset {pos} ({why}) where frame index {n} was expected; "
                f"no valid record header in the remaining {remaining} bytes, ignored to end of file")
            return self._size
        self._note("lost_sync",
            f"corrupt record header at byte offset {pos} ({why}) where frame index {n} was expected; "
            f"resynchronised at byte offset {nxt} ({nxt - pos} bytes skipped); frames after it are numbered from {n}")
        return nxt

    def _record(self, pos: int, hdr: bytes) -> tuple[int, _Scanned | None]:
        """Index the record whose header at `pos` validated; (where the next one starts, the record)."""
        size = self._size
        entries = self._entries
        (_, seq, ts, code, ndim, _reserved, d0, d1, d2, d3, nbytes, pcrc, _hcrc) = _RECORD.unpack(hdr)
        payload_offset = pos + RECORD_HEADER_SIZE
        end = payload_offset + nbytes
        dims = (d0, d1, d2, d3)
        dtype = DTYPE_CODES.get(code)
        entry = _Entry(payload_offset, seq, ts, dtype, tuple(dims[: min(ndim, MAX_NDIM)]), nbytes, pcrc)
        if end > size:
            nxt = self._resync(payload_offset)
            if nxt is not None:
                self._drop_damaged(_Scanned(pos, entry, None), nxt, f"its payload would end {end - size} bytes "
                                                                     "past the end of the file")
                return nxt, None
            self._note("truncated_tail",
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
            self._note("unusable",
                f"record at byte offset {pos} (sequence {seq}) is unusable ({bad}); skipped, "
                f"frames after it are numbered from {len(entries)}")
            return end, _Scanned(pos, entry, None)
        entries.append(entry)
        self._keys.append(hdr[4:22] + hdr[24:52])  # every field but the marker, reserved and header CRC
        return end, _Scanned(pos, entry, len(entries) - 1)

    def _check_order(self, data_start: int) -> None:
        """Repeated records and sequences that do not go forward; the byte count outside the index."""
        first: dict[bytes, int] = {}
        last_seq = None
        for i, (e, key) in enumerate(zip(self._entries, self._keys)):
            j = first.setdefault(key, i)
            if j != i:
                self._repeat_of[i] = j
                self._note("repeated",
                    f"frame index {i} (sequence {e.sequence}, byte offset {e.payload_offset - RECORD_HEADER_SIZE}) "
                    f"repeats frame index {j}: the same header fields and payload CRC-32, a copy of that record")
                continue
            if last_seq is not None and e.sequence <= last_seq:
                self._note("sequence_backwards",
                    f"frame index {i} (byte offset {e.payload_offset - RECORD_HEADER_SIZE}): sequence {e.sequence} "
                    f"is not after the previous frame's {last_seq} (a restarted source, or records out of order)")
            last_seq = e.sequence
        indexed = sum(RECORD_HEADER_SIZE + e.nbytes for e in self._entries)
        self._counts["unindexed_bytes"] = self._size - data_start - indexed

    # ---- public API --------------------------------------------------------------------------
    @property
    def path(self) -> str:
        return self._path

    @property
    def version(self) -> int:
        return self._version

    @property
    def sensor_toml(self) -> str:
        return self._sensor_toml

    @property
    def ground_truth(self) -> Any:
        return self._ground_truth

    @property
    def metadata(self) -> dict:
        return self._metadata

    @property
    def created_utc(self) -> str | None:
        return self._created_utc

    @property
    def problems(self) -> list[str]:
        """Human-readable problems found so far (a copy; grows when skip_corrupt iteration skips frames)."""
        return list(self._problems)

    @property
    def counts(self) -> dict[str, int]:
        """Problems by reason (COUNT_NAMES; a copy; `corrupt_skipped` grows as iteration skips frames)."""
        return dict(self._counts)

    def repeat_of(self, index: int) -> int | None:
        """Index of the earlier frame that frame `index` is a copy of, or None."""
        return self._repeat_of.get(self._entry(index)[0])

    @property
    def skip_corrupt(self) -> bool:
        return self._skip_corrupt

    @property
    def skip_repeated(self) -> bool:
        return self._skip_repeated

    @property
    def closed(self) -> bool:
        return self._file is None

    def __len__(self) -> int:
        return len(self._entries)

    def _entry(self, index: int) -> tuple[int, _Entry]:
        try:
            i = operator.index(index)
        except TypeError:
            raise TypeError(f"frame index must be an integer, got {type(index).__name__}") from None
        n = len(self._entries)
        j = i + n if i < 0 else i
        if not 0 <= j < n:
            raise FrameIndexError(f"capture {self._path!r}: frame index {i} out of range (file has {n} frames)")
        return j, self._entries[j]

    def frame_shape(self, index: int) -> tuple[int, ...]:
        """Payload shape of frame `index`, from the index (no I/O)."""
        return self._entry(index)[1].shape

    def frame_dtype(self, index: int) -> np.dtype:
        """Payload dtype (little-endian) of frame `index`, from the index (no I/O)."""
        return self._entry(index)[1].dtype

    def _fill(self, j: int, e: _Entry, arr: np.ndarray) -> None:
        if self._file is None:
            raise self._fail("reader is closed")
        raw = arr.reshape(-1).view(np.uint8)
        if e.nbytes:
            self._file.seek(e.payload_offset)
            got = self._file.readinto(raw)
            while got is not None and got < e.nbytes:  # a regular file returns short only at EOF
                more = self._file.readinto(raw[got:])
                if not more:
                    break
                got += more
            if got != e.nbytes:
                raise self._fail(f"frame {j}: payload cut short ({got} of {e.nbytes} bytes); was the file truncated after opening?")
        crc = zlib.crc32(raw)
        if crc != e.payload_crc32:
            raise CorruptFrameError(
                f"capture {self._path!r}: frame {j} (sequence {e.sequence}, byte offset {e.payload_offset}): "
                f"payload corrupt, CRC-32 mismatch (stored 0x{e.payload_crc32:08X}, computed 0x{crc:08X})",
                j, self._path,
            )

    def read(self, index: int) -> CaptureFrame:
        """Frame `index` (negative counts from the end) in a new array.  CubecastError if its CRC fails."""
        j, e = self._entry(index)
        arr = np.empty(e.shape, dtype=e.dtype)
        self._fill(j, e, arr)
        return CaptureFrame(j, e.sequence, e.timestamp_s, arr)

    __getitem__ = read

    def read_into(self, index: int, out: np.ndarray) -> CaptureFrame:
        """Read frame `index` into the preallocated C-contiguous writable array `out` (same shape and
        dtype as the frame) and return a CaptureFrame whose payload is `out`.  On a CRC failure it
        raises CubecastError and `out` holds the corrupt bytes."""
        j, e = self._entry(index)
        if not isinstance(out, np.ndarray):
            raise CubecastError(f"capture {self._path!r}: read_into needs a numpy array, got {type(out).__name__}")
        if out.shape != e.shape or out.dtype != e.dtype:
            raise CubecastError(
                f"capture {self._path!r}: frame {j} is {e.dtype} {e.shape}, read_into got {out.dtype} {out.shape}"
            )
        if not (out.flags.c_contiguous and out.flags.writeable):
            raise CubecastError(f"capture {self._path!r}: read_into needs a C-contiguous writable array")
        self._fill(j, e, out)
        return CaptureFrame(j, e.sequence, e.timestamp_s, out)

    def __iter__(self) -> Iterator[CaptureFrame]:
        """Frames in file order, one read at a time.  With skip_corrupt=True frames whose payload CRC
        fails are skipped and listed in `problems`; otherwise the first such frame raises.  With
        skip_repeated=True copies of earlier frames (`repeat_of`) are passed over."""
        for j in range(len(self._entries)):
            if self._skip_repeated and j in self._repeat_of:
                continue
            try:
                frame = self.read(j)
            except CorruptFrameError as exc:
                if not self._skip_corrupt:
                    raise
                if j not in self._reported_corrupt:
                    self._reported_corrupt.add(j)
                    self._note("corrupt_skipped", f"skipped frame index {j}: {exc}")
                continue
            yield frame

    def close(self) -> None:
        if self._file is not None:
            f, self._file = self._file, None
            f.close()

    def __enter__(self) -> "CaptureReader":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"CaptureReader({self._path!r}, frames={len(self._entries)}, problems={len(self._problems)})"
