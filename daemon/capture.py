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
readinto.  Neither is thread-safe; use one object per thread.  The record layout's constants and
the walk over the records on open (recovery from damage) are in capturescan.py.
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

from .capturescan import (COUNT_NAMES, DTYPE_CODES, MAX_NDIM, RECORD_BODY, RECORD_HEADER_SIZE, RECORD_MARKER, U32,
                          Entry, RecordScan)
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

_FILE_PREFIX = struct.Struct("<8sHI")  # magic, version, json_len
assert _FILE_PREFIX.size == 14

MAX_JSON_DEPTH = 64
"""Deepest nesting of arrays and objects the JSON header may have (writer and reader refuse more)."""

_U32_MAX = 0xFFFFFFFF
_U64_MAX = 0xFFFFFFFFFFFFFFFF


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
            U32.pack(zlib.crc32(json_bytes)),
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
        body = RECORD_BODY.pack(RECORD_MARKER, seq, ts, code, len(shape), 0, *dims, raw.nbytes, zlib.crc32(raw))
        self._write_parts([body, U32.pack(zlib.crc32(body)), raw])
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
    the frames.  Problems found while scanning are listed in `problems` instead of raising; each
    line about a record is counted in `counts` under one reason:

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
        try:
            self._file: io.FileIO | None = open(self._path, "rb", buffering=0)
        except OSError as exc:
            raise CubecastError(f"capture {self._path!r}: cannot open: {exc.strerror or exc}") from None
        try:
            self._size = os.fstat(self._file.fileno()).st_size
            data_start = self._read_file_header()
            self._records = RecordScan(self._read_exact_at, self._size, self._problems, self._counts)
            self._records.walk(data_start)
            self._records.check_order(data_start)
            self._entries = self._records.entries
            self._repeat_of = self._records.repeat_of
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
        (stored_crc,) = U32.unpack_from(json_bytes, json_len)
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

    def _entry(self, index: int) -> tuple[int, Entry]:
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

    def frame_sequence(self, index: int) -> int:
        """Sequence number of frame `index`, from the index (no I/O, so also for a corrupt payload)."""
        return self._entry(index)[1].sequence

    def frame_timestamp_s(self, index: int) -> float:
        """Timestamp of frame `index`, from the index (no I/O, so also for a corrupt payload)."""
        return self._entry(index)[1].timestamp_s

    def frame_nbytes(self, index: int) -> int:
        """Payload byte count of frame `index`, from the index (no I/O)."""
        return self._entry(index)[1].nbytes

    def frame_dtype(self, index: int) -> np.dtype:
        """Payload dtype (little-endian) of frame `index`, from the index (no I/O)."""
        return self._entry(index)[1].dtype

    def _fill(self, j: int, e: Entry, arr: np.ndarray) -> None:
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
        return self.frames()

    def frames(self, start: int = 0, stop: int | None = None) -> Iterator[CaptureFrame]:
        """As iteration, over the frame indexes start..stop-1 only (a part of the file: `cubecast batch`)."""
        for j in range(*slice(start, stop).indices(len(self._entries))):
            if self._skip_repeated and j in self._repeat_of:
                continue
            try:
                frame = self.read(j)
            except CorruptFrameError as exc:
                if not self._skip_corrupt:
                    raise
                if j not in self._reported_corrupt:
                    self._reported_corrupt.add(j)
                    self._records.note("corrupt_skipped", f"skipped frame index {j}: {exc}")
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
