"""The hardware adapter: a development board's raw sample stream in, `adc` frames out. `cubecast adapter`.

A board's capture path sends its ADC samples as a stream of UDP datagrams: each datagram is a header
(a packet counter, the byte offset of its payload in the continuous sample stream, ...) and a payload
of consecutive stream bytes. The adapter reads that stream live (`--listen udp://HOST:PORT`) or from a
datagram file (`--file PATH`), cuts it into frames by byte offset, converts each complete frame to the
sensor's ADC format and publishes it on the wire (kind `adc`, digest and crc32, wire.md), so `serve`
takes it like any other source.

How to read a stream is declared in a *stream layout* (TOML, cubecast's own format; README "Stream
layout", example replay_samples/example_layout.toml):

    [layout]                          optional: description = "free text"
    [packet]
    header_size_bytes = 24            bytes before the payload in every datagram
    [[packet.field]]                  one table per header field
    name = "sequence"                 a label (unique)
    offset_bytes = 4                  from the start of the datagram
    size_bytes = 4                    1..8
    type = "uint"                     "uint" or "int" (two's complement)
    byte_order = "little"             "little" or "big"
    meaning = "packet_sequence"       packet_sequence | byte_offset | frame_number | payload_size | ignore
    [samples]
    type = "int16"                    "int16" or "packed12"
    byte_order = "little"             int16 only
    iq_order = "iq"                   "iq", "qi" or "real"
    axis_order = ["chirp", "rx", "sample", "iq"]   slowest to fastest; "iq" absent for real samples

Meanings: `packet_sequence` (required, uint or int) counts datagrams, +1 per datagram, wrapping at its
size; `byte_offset` (required, uint) is the position of the payload's first byte in the continuous
stream, byte 0 being the first byte of a frame; `frame_number` (optional) is the number of the frame
holding the payload's first byte (any origin: only its agreement with the byte offset is checked);
`payload_size` (optional, uint) is the payload length in bytes, the payload then being exactly that
many bytes after the header (trailing bytes are padding); without it the payload is the rest of the
datagram; `ignore` fields are shown in the first-datagram line only.

Packed 12-bit samples: every 3 bytes b0 b1 b2 hold two consecutive samples of the stream. Read them as
the 24-bit little-endian word w = b0 + 256 b1 + 65536 b2: the first sample is bits 0..11 of w (b0 and
the low nibble of b1), the second bits 12..23 (the high nibble of b1 and b2); each is 12-bit two's
complement (-2048..2047).

I/Q order: the sensor's int16 ADC format has a trailing axis of 2 (index 0 "I", index 1 "Q"; the
sensor's own swap_iq/conjugate describe what those mean, as for every source). "iq" means the stream
carries index 0 first, "qi" index 1 first; "real" is for real sampling (no iq axis).

Frames: with F the frame size in stream bytes (chirps_per_frame x n_rx x samples_per_chirp x
components x bytes per sample; 3/2 bytes per sample when packed), frame k is stream bytes
[k F, (k+1) F). A payload may span frames. At most `window_frames` frames are in flight (being filled);
a datagram for a frame beyond the window gives up the oldest: a frame with missing bytes is dropped
with its reason and counted, never published half-filled. Complete frames are published in order with
`seq` = k. Datagram losses, duplicates and reordering are counted from `packet_sequence`; a stream that
restarts (its counter and byte offset jump back and keep counting from there) is followed with a new
`run` id.

Datagram file: the datagrams as received, each written as its length (u32, little-endian) followed by
its bytes, one after the other, no file header (README "Datagram file"). `--save-datagrams PATH`
writes one from a live stream; `--file PATH` reads one.

Timestamps: live, the wall-clock time (time.time()) at which the first datagram of a frame arrived;
from a file, k x frame_period_s (the file holds no clock).

Layers: StreamLayout/parse_layout (the file), FrameConverter (stream frame bytes -> ADC frame, pure
numpy), Reassembler (datagrams -> frames and counters; pure, no I/O), StreamAdapter (sockets, files,
publishing, health lines once a second, SIGINT/SIGTERM via the CLI).
"""

from __future__ import annotations

import collections
import math
import re
import select
import socket
import struct
import sys
import threading
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np

from .errors import CubecastError
from .sensor import Sensor

MEANINGS = ("packet_sequence", "byte_offset", "frame_number", "payload_size", "ignore")
FIELD_TYPES = ("uint", "int")
BYTE_ORDERS = ("little", "big")
SAMPLE_TYPES = ("int16", "packed12")
IQ_ORDERS = ("iq", "qi", "real")
AXES = ("chirp", "rx", "sample", "iq")
MAX_DATAGRAM_BYTES = 65535  # a UDP datagram's payload cannot be larger
DEFAULT_WINDOW_FRAMES = 3
MAX_WINDOW_FRAMES = 16
RESTART_PACKETS = 16  # consecutive datagrams far behind the stream, counting up: the board restarted
DEFAULT_RCVBUF_BYTES = 8 * 1024 * 1024
DATAGRAM_LENGTH = struct.Struct("<I")


def _stderr_line(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


# ---- the layout file ----------------------------------------------------------------------------

@dataclass(frozen=True)
class HeaderField:
    """One datagram header field. Values are read as unsigned `size_bytes`-byte integers in
    `byte_order`; `signed` only changes how the field is shown."""

    name: str
    offset_bytes: int
    size_bytes: int
    signed: bool
    byte_order: str
    meaning: str

    @property
    def bits(self) -> int:
        return 8 * self.size_bytes

    def reader(self) -> Callable[[Any], int]:
        """A function datagram -> the field's unsigned value."""
        off, size = self.offset_bytes, self.size_bytes
        code = {1: "B", 2: "H", 4: "I", 8: "Q"}.get(size)
        if code is not None:
            unpack = struct.Struct(("<" if self.byte_order == "little" else ">") + code).unpack_from
            return lambda dg: unpack(dg, off)[0]
        order = self.byte_order
        return lambda dg: int.from_bytes(dg[off:off + size], order)

    def shown(self, value: int) -> int:
        if self.signed and value >= 1 << (self.bits - 1):
            return value - (1 << self.bits)
        return value


@dataclass(frozen=True)
class StreamLayout:
    """A validated stream layout (see the module docstring)."""

    header_size_bytes: int
    fields: tuple[HeaderField, ...]
    sample_type: str
    sample_byte_order: str
    iq_order: str
    axis_order: tuple[str, ...]
    description: str = ""
    origin: str | None = None

    def field(self, meaning: str) -> HeaderField | None:
        for f in self.fields:
            if f.meaning == meaning:
                return f
        return None

    @property
    def is_complex(self) -> bool:
        return self.iq_order != "real"


def _where(origin: str | None) -> str:
    return f"{origin}: " if origin else ""


class _Table:
    """Typed access to one TOML table; errors name the table, the field, the value and the rule."""

    def __init__(self, table: Any, label: str, origin: str | None):
        self.origin, self.label = origin, label
        if not isinstance(table, dict):
            raise CubecastError(f"{_where(origin)}{label} must be a table")
        self.table = table
        self.used: set[str] = set()

    def fail(self, name: str, value: Any, rule: str) -> CubecastError:
        return CubecastError(f"{_where(self.origin)}{self.label} {name} = {value!r}: {rule}")

    def raw(self, name: str, default: Any = ...) -> Any:
        self.used.add(name)
        if name not in self.table:
            if default is ...:
                raise CubecastError(f"{_where(self.origin)}{self.label} {name} is missing")
            return default
        return self.table[name]

    def integer(self, name: str, lo: int, hi: int, default: Any = ...) -> int:
        v = self.raw(name, default)
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            raise self.fail(name, v, f"must be a whole number in {lo}..{hi}")
        return v

    def choice(self, name: str, options: tuple[str, ...], default: Any = ...) -> str:
        v = self.raw(name, default)
        if v not in options:
            raise self.fail(name, v, f"must be one of {', '.join(repr(o) for o in options)}")
        return v

    def check_unknown(self) -> None:
        unknown = sorted(set(self.table) - self.used)
        if unknown:
            raise CubecastError(f"{_where(self.origin)}{self.label} has unknown field(s) {', '.join(unknown)}")


def parse_layout(text: str, origin: str | None = None) -> StreamLayout:
    """Parse and validate the text of a stream layout. Raises CubecastError naming the field, the value
    and the rule."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CubecastError(f"{_where(origin)}not valid TOML: {exc}") from None
    unknown = sorted(set(doc) - {"layout", "packet", "samples"})
    if unknown:
        raise CubecastError(f"{_where(origin)}unknown section(s) {', '.join('[' + u + ']' for u in unknown)}; "
                            "a stream layout has [layout], [packet] and [samples]")
    for section in ("packet", "samples"):
        if section not in doc:
            raise CubecastError(f"{_where(origin)}missing section [{section}]")

    description = ""
    if "layout" in doc:
        lt = _Table(doc["layout"], "[layout]", origin)
        description = lt.raw("description", "")
        if not isinstance(description, str):
            raise lt.fail("description", description, "must be a string")
        lt.check_unknown()

    pk = _Table(doc["packet"], "[packet]", origin)
    header_size = pk.integer("header_size_bytes", 0, MAX_DATAGRAM_BYTES - 1)
    entries = pk.raw("field", [])
    if not isinstance(entries, list) or any(not isinstance(e, dict) for e in entries):
        raise pk.fail("field", entries, "must be an array of tables ([[packet.field]] entries)")
    pk.check_unknown()
    fields: list[HeaderField] = []
    for i, entry in enumerate(entries):
        ft = _Table(entry, f"[[packet.field]] #{i + 1}", origin)
        name = ft.raw("name")
        if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9_.-]{1,64}", name):
            raise ft.fail("name", name, "must be 1..64 letters, digits, '_', '.' or '-'")
        ft.label = f"[[packet.field]] '{name}'"
        offset = ft.integer("offset_bytes", 0, MAX_DATAGRAM_BYTES - 1)
        size = ft.integer("size_bytes", 1, 8)
        ftype = ft.choice("type", FIELD_TYPES)
        order = ft.choice("byte_order", BYTE_ORDERS)
        meaning = ft.choice("meaning", MEANINGS)
        ft.check_unknown()
        if offset + size > header_size:
            raise ft.fail("offset_bytes", offset, f"the field (bytes {offset}..{offset + size - 1}) must lie inside "
                                                  f"the header of header_size_bytes = {header_size}")
        if meaning in ("byte_offset", "payload_size") and ftype != "uint":
            raise ft.fail("type", ftype, f"a {meaning} field must be 'uint'")
        if meaning == "payload_size" and size > 4:
            raise ft.fail("size_bytes", size, "a payload_size field has at most 4 bytes (datagrams are < 64 KiB)")
        for other in fields:
            if offset < other.offset_bytes + other.size_bytes and other.offset_bytes < offset + size:
                raise ft.fail("offset_bytes", offset, f"bytes {offset}..{offset + size - 1} overlap field "
                                                      f"'{other.name}' (bytes {other.offset_bytes}.."
                                                      f"{other.offset_bytes + other.size_bytes - 1})")
            if other.name == name:
                raise ft.fail("name", name, "must be unique among the header fields")
        fields.append(HeaderField(name, offset, size, ftype == "int", order, meaning))
    for meaning, required in (("packet_sequence", True), ("byte_offset", True), ("frame_number", False),
                              ("payload_size", False)):
        n = sum(f.meaning == meaning for f in fields)
        if n > 1:
            raise CubecastError(f"{_where(origin)}[packet] has {n} fields with meaning = {meaning!r}: at most one")
        if required and n == 0:
            what = ("a counter incremented per datagram" if meaning == "packet_sequence"
                    else "the offset of the payload in the continuous stream")
            raise CubecastError(f"{_where(origin)}[packet] needs one [[packet.field]] with meaning = {meaning!r} "
                                f"({what})")

    st = _Table(doc["samples"], "[samples]", origin)
    sample_type = st.choice("type", SAMPLE_TYPES)
    if sample_type == "int16":
        sample_order = st.choice("byte_order", BYTE_ORDERS)
    else:
        if "byte_order" in st.table:
            raise st.fail("byte_order", st.table["byte_order"], "applies to int16 samples only; packed12 has "
                                                                "one fixed bit order (see the README)")
        sample_order = "little"
    iq_order = st.choice("iq_order", IQ_ORDERS)
    axes = st.raw("axis_order")
    want = ["chirp", "rx", "sample"] + ([] if iq_order == "real" else ["iq"])
    if (not isinstance(axes, list) or any(not isinstance(a, str) for a in axes)
            or sorted(axes) != sorted(want)):
        rule = ("must name chirp, rx and sample once each (real samples have no 'iq' axis), slowest first"
                if iq_order == "real" else
                "must name chirp, rx, sample and iq once each, slowest first, e.g. ['chirp', 'rx', 'sample', 'iq']")
        raise st.fail("axis_order", axes, rule)
    st.check_unknown()
    return StreamLayout(header_size, tuple(fields), sample_type, sample_order, iq_order, tuple(axes),
                        description, origin)


def load_layout(path: str | Path) -> StreamLayout:
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise CubecastError(f"cannot read stream layout {path}: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise CubecastError(f"{path}: not UTF-8 text") from None
    return parse_layout(text, str(path))


# ---- stream frame -> ADC frame --------------------------------------------------------------------

class FrameConverter:
    """Converts the F stream bytes of one frame into the sensor's ADC format (a fresh array per frame,
    since it is handed to ZeroMQ without a copy): unpack (int16 view or 12-bit unpacking into a reused
    buffer), reshape to the layout's axis order, transpose to [chirp, rx, sample(, iq)], pick I/Q."""

    def __init__(self, layout: StreamLayout, sensor: Sensor):
        where = _where(layout.origin)
        if layout.is_complex != sensor.adc.is_complex:
            raise CubecastError(
                f"{where}[samples] iq_order = {layout.iq_order!r}: sensor '{sensor.sensor_id}' samples "
                f"{sensor.adc.sampling}ly; use " + ("'iq' or 'qi'" if sensor.adc.is_complex else "'real'"))
        dims = {"chirp": sensor.chirps_per_frame, "rx": sensor.n_rx, "sample": sensor.samples_per_chirp, "iq": 2}
        self.layout, self.sensor = layout, sensor
        self.stream_shape = tuple(dims[a] for a in layout.axis_order)
        target = ("chirp", "rx", "sample", "iq") if layout.is_complex else ("chirp", "rx", "sample")
        self.perm = tuple(layout.axis_order.index(a) for a in target)
        self.n_components = int(np.prod(self.stream_shape))
        if layout.sample_type == "packed12":
            if self.n_components % 2:
                raise CubecastError(f"{where}[samples] type = 'packed12': a frame of {self.n_components} samples "
                                    "cannot be packed two per 3 bytes (needs an even count)")
            self.frame_bytes = self.n_components * 3 // 2
            n_pairs = self.n_components // 2
            self._components = np.empty(self.n_components, np.int16)
            self._a = np.empty(n_pairs, np.int16)
            self._b = np.empty(n_pairs, np.int16)
            self._t = np.empty(n_pairs, np.int16)
        else:
            self.frame_bytes = self.n_components * 2
            self._int16 = np.dtype("<i2" if layout.sample_byte_order == "little" else ">i2")
        self.raw_shape = sensor.adc.raw_shape(sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        self.raw_dtype = sensor.adc.raw_dtype()

    def components(self, frame: np.ndarray) -> np.ndarray:
        """The frame's samples as int16 in stream order (a view, or a reused buffer when packed)."""
        if self.layout.sample_type == "int16":
            return frame.view(self._int16)
        triples = frame.reshape(-1, 3)
        a, b, t = self._a, self._b, self._t
        # first sample: b0 | (b1 & 0x0F) << 8 ; second: (b1 >> 4) | b2 << 4 ; then sign-extend 12 bits
        np.copyto(a, triples[:, 0])
        np.copyto(t, triples[:, 1])
        np.bitwise_and(t, 0x0F, out=b)
        np.left_shift(b, 8, out=b)
        np.bitwise_or(a, b, out=a)
        np.right_shift(t, 4, out=t)
        np.copyto(b, triples[:, 2])
        np.left_shift(b, 4, out=b)
        np.bitwise_or(b, t, out=b)
        for x in (a, b):
            np.bitwise_xor(x, 0x800, out=x)
            np.subtract(x, 0x800, out=x)
        self._components[0::2] = a
        self._components[1::2] = b
        return self._components

    def convert(self, frame: np.ndarray) -> np.ndarray:
        """`frame`: uint8 [frame_bytes] in stream order -> a new array of the sensor's ADC format."""
        if frame.dtype != np.uint8 or frame.shape != (self.frame_bytes,):
            raise ValueError(f"expected {self.frame_bytes} uint8 stream bytes, got {frame.dtype} {frame.shape}")
        t = self.components(frame).reshape(self.stream_shape).transpose(self.perm)
        if self.layout.iq_order == "qi":
            t = t[..., ::-1]
        out = np.empty(self.raw_shape, self.raw_dtype)
        if self.raw_dtype.kind == "c":
            out.real[...] = t[..., 0]
            out.imag[...] = t[..., 1]
        else:
            out[...] = t
        return out


# ---- datagrams -> frames (pure, no I/O) ---------------------------------------------------------

@dataclass
class AssembledFrame:
    """A complete frame: `index` = the frame's number in the stream (byte offset // frame size), published
    as `seq`; `data` in the sensor's ADC format; `arrival_s` the caller's time of its first datagram;
    `epoch` counts detected stream restarts (each one is a new run)."""

    index: int
    data: np.ndarray
    arrival_s: float
    epoch: int


class _Slot:
    __slots__ = ("index", "data", "view", "covered", "received", "arrival_s")

    def __init__(self, frame_bytes: int):
        self.data = np.empty(frame_bytes, np.uint8)
        self.view = memoryview(self.data)
        self.covered = np.zeros(frame_bytes, bool)
        self.index, self.received, self.arrival_s = -1, 0, 0.0


NEW, REORDERED, DUPLICATE, BEHIND = "new", "reordered", "duplicate", "behind"


class SequenceTracker:
    """Classifies datagram counters: new (ahead of all seen), reordered (behind the highest but never
    seen), duplicate (seen already), behind (older than the window: cannot tell). A number skipped
    over counts as lost once it falls out of the window without arriving (or at `finish`).

    The counter wraps at 2**bits; values are unwrapped to the nearest of the highest seen."""

    def __init__(self, bits: int, window: int):
        self.mod = 1 << bits
        self.window = max(1, min(window, self.mod // 2 - 1))
        self.first: int | None = None
        self.hi: int | None = None
        self._order: collections.deque = collections.deque()
        self._missing: set[int] = set()
        self._early: set[int] = set()
        self.reordered = self.duplicates = self.lost = 0

    def unwrap(self, raw: int) -> int:
        if self.hi is None:
            return raw
        d = (raw - self.hi) % self.mod
        if d >= self.mod // 2:
            d -= self.mod
        return self.hi + d

    def classify(self, raw: int) -> str:
        s = self.unwrap(raw)
        if self.hi is None:
            self.first = self.hi = s
            return NEW
        if s > self.hi:
            lo = self.hi + 1
            if s - lo > self.window:  # a jump past the window: those numbers are lost at once
                self.lost += s - self.window - lo
                lo = s - self.window
            for x in range(lo, s):
                self._order.append(x)
                self._missing.add(x)
            self.hi = s
            edge = s - self.window
            while self._order and self._order[0] <= edge:
                x = self._order.popleft()
                if x in self._missing:
                    self._missing.discard(x)
                    self.lost += 1
            if self._early and self.first <= edge:
                self._early.clear()
            return NEW
        if s <= self.hi - self.window:
            return BEHIND
        if s in self._missing:
            self._missing.discard(s)
            self.reordered += 1
            return REORDERED
        if s < self.first and s not in self._early:  # older than the first one seen: arrived late
            self._early.add(s)
            self.reordered += 1
            return REORDERED
        self.duplicates += 1
        return DUPLICATE

    def finish(self) -> None:
        """The stream ended (or restarted): every number still missing is lost."""
        self.lost += len(self._missing)
        self._missing.clear()
        self._order.clear()


def _unwrap(raw: int, ref: int | None, mod: int) -> int:
    if ref is None:
        return raw
    d = (raw - ref) % mod
    if d >= mod // 2:
        d -= mod
    return ref + d


class Reassembler:
    """Datagrams in (feed), complete frames in the sensor's ADC format out, in order, with counters.
    Pure and I/O free; not thread-safe. Memory: `window_frames` frame buffers, reused."""

    COUNTERS = ("packets", "payload_bytes", "malformed", "duplicates", "reordered", "lost", "late",
                "frames_complete", "frames_dropped", "missing_bytes", "frame_number_mismatches", "restarts")

    def __init__(self, layout: StreamLayout, sensor: Sensor, window_frames: int = DEFAULT_WINDOW_FRAMES):
        if isinstance(window_frames, bool) or not isinstance(window_frames, int) \
                or not 1 <= window_frames <= MAX_WINDOW_FRAMES:
            raise CubecastError(f"--window-frames {window_frames!r}: must be a whole number in 1..{MAX_WINDOW_FRAMES}")
        self.layout, self.sensor = layout, sensor
        self.converter = FrameConverter(layout, sensor)
        self.frame_bytes = self.converter.frame_bytes
        self.window = window_frames
        self.header_size = layout.header_size_bytes
        seq_f, off_f = layout.field("packet_sequence"), layout.field("byte_offset")
        size_f, fn_f = layout.field("payload_size"), layout.field("frame_number")
        self._read_seq, self._seq_bits = seq_f.reader(), seq_f.bits
        self._read_off, self._off_mod = off_f.reader(), 1 << off_f.bits
        self._read_size = size_f.reader() if size_f else None
        self._read_fn = fn_f.reader() if fn_f else None
        self._fn_mod = (1 << fn_f.bits) if fn_f else 0
        self._pool = [_Slot(self.frame_bytes) for _ in range(window_frames)]
        self.counters: dict[str, int] = {k: 0 for k in self.COUNTERS}
        self.drop_reasons: collections.Counter = collections.Counter()
        self.malformed_reasons: collections.Counter = collections.Counter()
        self.events: collections.deque = collections.deque(maxlen=256)  # (kind, text) for the caller's log
        self.epoch = 0
        self.first_header: dict[str, int] | None = None
        self._reset()

    def _reset(self) -> None:
        self.base: int | None = None  # the oldest frame not yet published or dropped
        self.slots: dict[int, _Slot] = {}
        self.seqs: SequenceTracker | None = None
        self._off_ref: int | None = None
        self._fn_diff: int | None = None
        self._behind: list[tuple[int, bytes, float]] = []

    # -- public ---------------------------------------------------------------------------------
    def feed(self, datagram, arrival_s: float = 0.0) -> list[AssembledFrame]:
        """Take one datagram (bytes-like; not kept after the call). Returns the frames completed by it
        (usually none or one), oldest first."""
        out: list[AssembledFrame] = []
        self.counters["packets"] += 1
        self._feed(memoryview(datagram), arrival_s, out)
        return out

    def flush(self, reason: str = "the stream ended") -> list[AssembledFrame]:
        """End of the stream: publish what is complete, drop what is not, settle the loss count."""
        out: list[AssembledFrame] = []
        self._finish(out, reason)
        return out

    def stats(self) -> dict:
        s: dict[str, Any] = dict(self.counters)
        s["drop_reasons"] = dict(self.drop_reasons)
        s["malformed_reasons"] = dict(self.malformed_reasons)
        if self.seqs is not None:
            s["duplicates"] += self.seqs.duplicates
            s["reordered"] += self.seqs.reordered
            s["lost"] += self.seqs.lost
        s["frames_in_flight"] = len(self.slots)
        s["frame_bytes"] = self.frame_bytes
        return s

    # -- internals ------------------------------------------------------------------------------
    def _malformed(self, reason: str, text: str) -> None:
        self.counters["malformed"] += 1
        self.malformed_reasons[reason] += 1
        self.events.append(("malformed", text))

    def _feed(self, dg: memoryview, t: float, out: list) -> None:
        n = dg.nbytes
        h = self.header_size
        if n < h:
            self._malformed("short", f"a datagram of {n} bytes is shorter than header_size_bytes = {h}")
            return
        seq_raw = self._read_seq(dg)
        off_raw = self._read_off(dg)
        if self._read_size is not None:
            size = self._read_size(dg)
            if h + size > n:
                self._malformed("payload_size", f"payload_size = {size} but the datagram holds only {n - h} "
                                                f"bytes after the {h}-byte header")
                return
            payload = dg[h:h + size]
        else:
            payload = dg[h:]
        length = payload.nbytes
        F = self.frame_bytes
        if self.first_header is None:
            self.first_header = {f.name: f.shown(f.reader()(dg)) for f in self.layout.fields}
            self.first_header["datagram_bytes"] = n
        off = _unwrap(off_raw, self._off_ref, self._off_mod)
        far_behind = off < 0 or (self.base is not None and off + length <= (self.base - self.window) * F)
        if self.seqs is None and not far_behind:
            per_frame = -(-F // max(1, length))
            self.seqs = SequenceTracker(self._seq_bits, max(16, (self.window + 1) * per_frame))
        cls = BEHIND if far_behind else self.seqs.classify(seq_raw)
        if cls == BEHIND:
            self._far_behind(seq_raw, dg, t, out)
            return
        if self._behind:
            self.counters["late"] += len(self._behind)
            self._behind.clear()
        if cls == DUPLICATE:
            return
        self.counters["payload_bytes"] += length
        if self._off_ref is None or off > self._off_ref:
            self._off_ref = off
        if self._read_fn is not None:
            d = (self._read_fn(dg) - off // F) % self._fn_mod
            if self._fn_diff is None:
                self._fn_diff = d
            elif d != self._fn_diff:
                self.counters["frame_number_mismatches"] += 1
                self.events.append(("frame_number", f"datagram at byte offset {off} carries frame_number "
                                                    f"{self._read_fn(dg)}, off by {(d - self._fn_diff) % self._fn_mod} "
                                                    f"from the frame its offset gives with frames of {F} bytes"))
        if length:
            self._place(off, payload, t, out)

    def _far_behind(self, seq_raw: int, dg: memoryview, t: float, out: list) -> None:
        buf = self._behind
        if buf and (seq_raw - buf[-1][0]) % (1 << self._seq_bits) != 1:
            self.counters["late"] += len(buf)
            buf.clear()
        buf.append((seq_raw, bytes(dg), t))
        if len(buf) >= RESTART_PACKETS:
            held = list(buf)
            buf.clear()
            self._finish(out, "the stream restarted")
            self.counters["restarts"] += 1
            self.epoch += 1
            self.events.append(("restart", f"the stream restarted (datagram counter {held[0][0]}); new run"))
            for _, data, t0 in held:
                self._feed(memoryview(data), t0, out)

    def _finish(self, out: list, reason: str) -> None:
        if self.slots:
            self._advance(max(self.slots) + 1, out, reason)
        if self.seqs is not None:
            self.seqs.finish()
            for k in ("duplicates", "reordered", "lost"):
                self.counters[k] += getattr(self.seqs, k)
        self.counters["late"] += len(self._behind)
        self._reset()

    def _place(self, off: int, payload: memoryview, t: float, out: list) -> None:
        F, length = self.frame_bytes, payload.nbytes
        if self.base is None:
            self.base = off // F
        pos = 0
        used = False
        while pos < length:
            k, within = divmod(off + pos, F)
            n = min(length - pos, F - within)
            if k >= self.base + self.window:
                self._advance(k - self.window + 1, out, "the reassembly window moved on")
            if k >= self.base:
                slot = self.slots.get(k)
                if slot is None:
                    slot = self._pool.pop()
                    slot.index, slot.received, slot.arrival_s = k, 0, t
                    slot.covered[:] = False
                    self.slots[k] = slot
                seg = slot.covered[within:within + n]
                new = n - int(np.count_nonzero(seg))
                if new:
                    slot.view[within:within + n] = payload[pos:pos + n]
                    seg[:] = True
                    slot.received += new
                used = True
            pos += n
        if not used:
            self.counters["late"] += 1
        self._drain(out)

    def _drain(self, out: list) -> None:
        while self.base in self.slots and self.slots[self.base].received == self.frame_bytes:
            self._release(self.slots.pop(self.base), out, None)
            self.base += 1

    def _advance(self, new_base: int, out: list, reason: str) -> None:
        """Finish every frame below new_base: publish the complete ones, drop the rest, in order."""
        while self.base < new_base:
            slot = self.slots.pop(self.base, None)
            if slot is None:
                ahead = [k for k in self.slots if k > self.base]
                stop = min(min(ahead, default=new_base), new_base)
                count = stop - self.base
                self.counters["frames_dropped"] += count
                self.counters["missing_bytes"] += count * self.frame_bytes
                self.drop_reasons["unseen"] += count
                first, last = self.base, stop - 1
                self.events.append(("dropped", (f"frame {first}" if count == 1 else f"frames {first}..{last}")
                                    + f": no byte arrived ({reason})"))
                self.base = stop
                continue
            self._release(slot, out, reason)
            self.base += 1
        self._drain(out)

    def _release(self, slot: _Slot, out: list, reason: str | None) -> None:
        F = self.frame_bytes
        if slot.received == F:
            out.append(AssembledFrame(slot.index, self.converter.convert(slot.data), slot.arrival_s, self.epoch))
            self.counters["frames_complete"] += 1
        else:
            missing = F - slot.received
            self.counters["frames_dropped"] += 1
            self.counters["missing_bytes"] += missing
            self.drop_reasons["incomplete"] += 1
            self.events.append(("dropped", f"frame {slot.index}: {missing} of {F} bytes missing ({reason})"))
        self._pool.append(slot)


# ---- datagram files -------------------------------------------------------------------------------

class DatagramFileWriter:
    """Writes datagrams as u32 little-endian length + bytes, one after the other (no file header)."""

    def __init__(self, path: str | Path):
        try:
            self._f = open(path, "wb")
        except OSError as exc:
            raise CubecastError(f"--save-datagrams {path}: cannot create file: {exc.strerror or exc}") from None
        self.path = str(path)
        self.datagrams = 0

    def write(self, datagram) -> None:
        view = memoryview(datagram)
        if view.nbytes > MAX_DATAGRAM_BYTES:
            raise CubecastError(f"datagram of {view.nbytes} bytes: at most {MAX_DATAGRAM_BYTES}")
        self._f.write(DATAGRAM_LENGTH.pack(view.nbytes))
        self._f.write(view)
        self.datagrams += 1

    def close(self) -> None:
        if self._f is not None:
            self._f.close()
            self._f = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def write_datagram_file(path: str | Path, datagrams) -> int:
    with DatagramFileWriter(path) as w:
        for d in datagrams:
            w.write(d)
        return w.datagrams


def iter_datagram_file(path: str | Path, warn: Callable[[str], None] | None = None) -> Iterator[memoryview]:
    """Yields each datagram of a datagram file as a memoryview of a reused buffer (valid until the next
    one). A truncated last record is reported through `warn` and ends the iteration; a length above
    65535 bytes (no UDP datagram is larger: not a datagram file) raises CubecastError."""
    try:
        f = open(path, "rb")
    except OSError as exc:
        raise CubecastError(f"--file {path}: cannot open: {exc.strerror or exc}") from None
    buf = bytearray(MAX_DATAGRAM_BYTES)
    view = memoryview(buf)
    pos = 0
    with f:
        while True:
            head = f.read(4)
            if not head:
                return
            if len(head) < 4:
                if warn:
                    warn(f"{path}: the last record is truncated at byte {pos} ({len(head)} of 4 length bytes); ignored")
                return
            (n,) = DATAGRAM_LENGTH.unpack(head)
            if n > MAX_DATAGRAM_BYTES:
                raise CubecastError(f"{path}: record at byte {pos} has length {n}: a datagram is at most "
                                    f"{MAX_DATAGRAM_BYTES} bytes (is this a datagram file?)")
            got = f.readinto(view[:n])
            if got < n:
                if warn:
                    warn(f"{path}: the last record is truncated at byte {pos} ({got} of {n} bytes); ignored")
                return
            pos += 4 + n
            yield view[:n]


# ---- sockets, files, publishing -----------------------------------------------------------------

def parse_udp_endpoint(text: str) -> tuple[int, str, int]:
    """'udp://HOST:PORT' (IPv4 host or name, or [IPv6]) -> (address family, host, port)."""
    pattern = r"udp://(\[([0-9A-Fa-f:.]+)\]|([^\[\]:/]+)):(\d{1,5})"
    m = re.fullmatch(pattern, text.strip()) if isinstance(text, str) else None
    if not m or int(m.group(4)) > 65535:
        raise CubecastError(f"--listen {text!r}: must be udp://HOST:PORT with PORT 0..65535 "
                            "(e.g. udp://0.0.0.0:5700, or udp://[::]:5700 for IPv6)")
    if m.group(2):
        return socket.AF_INET6, m.group(2), int(m.group(4))
    return socket.AF_INET, m.group(3), int(m.group(4))


def _format_stats(s: dict) -> str:
    drops = ", ".join(f"{k} {v}" for k, v in sorted(s["drop_reasons"].items()))
    return (f"packets {s['packets']} (malformed {s['malformed']}), duplicates {s['duplicates']}, "
            f"reordered {s['reordered']}, lost {s['lost']}, late {s['late']}; frames complete "
            f"{s['frames_complete']}, dropped {s['frames_dropped']}" + (f" ({drops})" if drops else "")
            + (f"; restarts {s['restarts']}" if s["restarts"] else ""))


class StreamAdapter:
    """`cubecast adapter`: StreamAdapter(layout, sensor, pub, listen=... | file=...).run(stop) -> stats.

    listen: 'udp://HOST:PORT' (port 0 picks a free one; see `udp_address` once `ready` is set);
    file: a datagram file; frames: stop after this many published frames (0 = no limit); speed: file
    mode only, factor of the frame period (None = as fast as possible); window_frames: frames in
    flight; save_datagrams: live mode, also write every datagram received to this datagram file.
    Health (the Reassembler's counters plus `frames_published`) once every `health_interval_s`."""

    def __init__(self, layout: StreamLayout, sensor: Sensor, pub_endpoint: str = "tcp://127.0.0.1:5601", *,
                 listen: str | None = None, file: str | Path | None = None, frames: int = 0,
                 speed: float | None = None, window_frames: int = DEFAULT_WINDOW_FRAMES, wait_s: float = 1.0,
                 rcvbuf_bytes: int = DEFAULT_RCVBUF_BYTES, save_datagrams: str | Path | None = None,
                 context=None, log: Callable[[str], None] | None = None, quiet: bool = False,
                 health_interval_s: float = 1.0):
        if (listen is None) == (file is None):
            raise CubecastError("adapter: give exactly one of --listen udp://HOST:PORT or --file PATH")
        if isinstance(frames, bool) or not isinstance(frames, int) or frames < 0:
            raise CubecastError(f"--frames {frames!r}: must be a whole number >= 0 (0 = no limit)")
        if speed is not None and not (speed > 0 and math.isfinite(speed)):
            raise CubecastError(f"--speed {speed!r}: must be a number > 0 or 'max'")
        if save_datagrams is not None and listen is None:
            raise CubecastError("--save-datagrams applies to --listen only (a --file is already saved)")
        self.udp = parse_udp_endpoint(listen) if listen is not None else None
        self.file = file
        if file is not None and not Path(file).is_file():
            raise CubecastError(f"--file {file}: no such file")
        self.layout, self.sensor = layout, sensor
        self.reassembler = Reassembler(layout, sensor, window_frames)
        self.pub_endpoint = pub_endpoint
        self.frames, self.speed, self.wait_s = frames, speed, wait_s
        self.rcvbuf_bytes, self.save_datagrams = rcvbuf_bytes, save_datagrams
        self.context = context
        self.write = log or _stderr_line
        self.quiet = quiet
        self.health_interval_s = health_interval_s
        self.ready = threading.Event()
        self.udp_address: tuple | None = None
        self.publisher = None
        self.frames_published = 0
        self.last_health: dict | None = None
        self._lock = threading.Lock()
        self._epoch = 0
        self._pace: tuple[float, int] | None = None
        self._warned: set[str] = set()
        from .service import RateLimitedLog
        self._event_log = RateLimitedLog(self.write, 5.0, "cubecast adapter: ")

    def bind(self) -> str:
        """Bind the publishing socket (before run, to learn the endpoint of tcp://...:*); returns it."""
        if self.publisher is None:
            from .sources import AdcPublisher
            self.publisher = AdcPublisher(self.sensor, self.pub_endpoint, context=self.context)
        return self.publisher.endpoint

    def stats(self) -> dict:
        with self._lock:
            s = self.reassembler.stats()
        s["frames_published"] = self.frames_published
        return s

    def _done(self) -> bool:
        return bool(self.frames) and self.frames_published >= self.frames

    def _publish(self, frames: list[AssembledFrame], stop: threading.Event, live: bool) -> None:
        from .sources import new_run_id
        pub = self.publisher
        for fr in frames:
            if self._done() or (stop.is_set() and not live and self.speed is not None):
                return
            if fr.epoch != self._epoch:
                self._epoch = fr.epoch
                pub.run_id = new_run_id()
                self._pace = None
            if live:
                ts = fr.arrival_s
            else:
                ts = fr.index * self.sensor.frame_period_s
                if self.speed is not None:
                    self._wait_pace(fr.index, stop)
            pub.seq = fr.index  # the wire seq is the frame's number in the stream
            pub.send(fr.data, ts)
            self.frames_published += 1

    def _wait_pace(self, index: int, stop: threading.Event) -> None:
        now = time.monotonic()
        if self._pace is None:
            self._pace = (now, index)
            return
        t0, k0 = self._pace
        target = t0 + (index - k0) * self.sensor.frame_period_s / self.speed
        if now - target > 0.5:  # stalled: re-anchor instead of bursting
            self._pace = (now, index)
            return
        if target > now:
            stop.wait(target - now)

    def _log_events(self) -> None:
        r = self.reassembler
        while r.events:
            kind, text = r.events.popleft()
            if kind == "frame_number" and kind in self._warned:
                continue
            if kind == "frame_number":
                self._warned.add(kind)
                self.write(f"cubecast adapter: warning: {text}; check that the sensor description's frame "
                           f"(chirps_per_frame x rx x samples_per_chirp) matches what the board streams")
                continue
            self._event_log(kind, text)
        self._event_log.flush()

    def _show_first(self) -> None:
        first = self.reassembler.first_header
        if first is not None and "first" not in self._warned:
            self._warned.add("first")
            if not self.quiet:
                self.write("cubecast adapter: first datagram: " + ", ".join(f"{k} {v}" for k, v in first.items()))

    def _health(self) -> None:
        s = self.stats()
        self.last_health = s
        if not self.quiet:
            self.write(f"cubecast adapter: {_format_stats(s)}; published {s['frames_published']}")

    def _open_udp(self) -> socket.socket:
        family, host, port = self.udp
        sock = socket.socket(family, socket.SOCK_DGRAM)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, self.rcvbuf_bytes)
            got = sock.getsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF)
            if got < self.rcvbuf_bytes:  # Linux reports twice the size it grants
                self.write(f"cubecast adapter: warning: the UDP receive buffer is {got} bytes, {self.rcvbuf_bytes} "
                           "asked for; bursts may be lost (on Linux raise net.core.rmem_max)")
            sock.bind((host, port))
        except OSError as exc:
            sock.close()
            raise CubecastError(f"--listen udp://{host}:{port}: cannot bind: {exc.strerror or exc}") from None
        sock.setblocking(False)
        self.udp_address = sock.getsockname()
        return sock

    def _run_udp(self, stop: threading.Event) -> None:
        sock = self._open_udp()
        saver = DatagramFileWriter(self.save_datagrams) if self.save_datagrams is not None else None
        poller = select.poll()
        poller.register(sock.fileno(), select.POLLIN)
        buf = bytearray(MAX_DATAGRAM_BYTES + 1)
        view = memoryview(buf)
        r = self.reassembler
        if not self.quiet:
            self.write(f"cubecast adapter: listening on udp {self.udp_address[0]}:{self.udp_address[1]}, publishing "
                       f"'{self.sensor.sensor_id}' on {self.publisher.endpoint} (run {self.publisher.run_id}, "
                       f"frames of {r.frame_bytes} stream bytes)")
        self.ready.set()
        next_health = time.monotonic() + self.health_interval_s
        try:
            while not stop.is_set() and not self._done():
                try:
                    n = sock.recv_into(buf)
                except (BlockingIOError, InterruptedError):
                    poller.poll(100)
                    n = -1
                if n >= 0:
                    dg = view[:n]
                    if saver is not None:
                        saver.write(dg)
                    with self._lock:
                        frames = r.feed(dg, time.time())
                    if "first" not in self._warned:
                        self._show_first()
                    if frames:
                        self._publish(frames, stop, live=True)
                if (now := time.monotonic()) >= next_health:
                    next_health = now + self.health_interval_s
                    self._log_events()
                    self._health()
        finally:
            sock.close()
            if saver is not None:
                saver.close()

    def _run_file(self, stop: threading.Event) -> None:
        r = self.reassembler
        if not self.quiet:
            self.write(f"cubecast adapter: reading {self.file}, publishing '{self.sensor.sensor_id}' on "
                       f"{self.publisher.endpoint} (run {self.publisher.run_id}, frames of {r.frame_bytes} stream "
                       "bytes)")
        self.ready.set()
        next_health = time.monotonic() + self.health_interval_s
        for dg in iter_datagram_file(self.file, warn=lambda t: self.write(f"cubecast adapter: warning: {t}")):
            if stop.is_set() or self._done():
                break
            with self._lock:
                frames = r.feed(dg)
            if "first" not in self._warned:
                self._show_first()
            if frames:
                self._publish(frames, stop, live=False)
            if (now := time.monotonic()) >= next_health:
                next_health = now + self.health_interval_s
                self._log_events()
                self._health()

    def run(self, stop: threading.Event | None = None) -> dict:
        """Until the stream ends (file), --frames, or `stop`; then flush. Returns the final stats."""
        stop = stop or threading.Event()
        self.bind()
        try:
            self.publisher.wait_for_subscribers(1, self.wait_s, stop)
            if self.udp is not None:
                self._run_udp(stop)
            else:
                self._run_file(stop)
            with self._lock:
                frames = self.reassembler.flush()
            self._publish(frames, stop, live=self.udp is not None)
        finally:
            if self.publisher is not None:
                self.publisher.close()
                self.publisher = None
            self._log_events()
            self._event_log.flush(force=True)
        s = self.stats()
        self.last_health = s
        if not self.quiet:
            self.write(f"cubecast adapter: published {s['frames_published']} frames; {_format_stats(s)}")
        return s


def adapter(layout_path: str, sensor_path: str, pub: str, *, listen: str | None = None, file: str | None = None,
            frames: int = 0, speed: str = "1", window_frames: int = DEFAULT_WINDOW_FRAMES,
            save_datagrams: str | None = None, quiet: bool = False) -> int:
    """`cubecast adapter`: until the file ends, --frames, SIGINT or SIGTERM."""
    from .sensor import load_sensor
    from .service import stop_on_signals
    from .sources import parse_speed
    layout = load_layout(layout_path)
    sensor = load_sensor(sensor_path)
    stop = threading.Event()
    with stop_on_signals(stop):
        a = StreamAdapter(layout, sensor, pub, listen=listen, file=file, frames=frames, speed=parse_speed(speed),
                          window_frames=window_frames, save_datagrams=save_datagrams, quiet=quiet)
        a.run(stop)
    return 0


def _run_args(args) -> int:
    return adapter(args.layout, args.sensor, args.pub, listen=args.listen, file=args.file, frames=args.frames,
                   speed=args.speed, window_frames=args.window_frames, save_datagrams=args.save_datagrams,
                   quiet=args.quiet)


def add_parser(subparsers):
    """Add the `adapter` subcommand to an argparse subparsers object; returns its parser."""
    p = subparsers.add_parser(
        "adapter", help="read a board's raw sample stream (UDP datagrams or a datagram file) and publish ADC frames")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--listen", metavar="udp://HOST:PORT", help="receive the board's datagrams on this UDP address")
    src.add_argument("--file", metavar="PATH", help="read datagrams from a datagram file (u32 length + bytes each)")
    p.add_argument("--layout", required=True, help="stream layout (TOML): header fields, sample type, axis order")
    p.add_argument("--sensor", required=True, help="sensor description (TOML): frame size and ADC format")
    p.add_argument("--pub", default="tcp://127.0.0.1:5601", metavar="ENDPOINT",
                   help="endpoint to bind for the ADC frames (default tcp://127.0.0.1:5601)")
    p.add_argument("--frames", type=int, default=0, metavar="N",
                   help="stop after N published frames (default: no limit)")
    p.add_argument("--speed", default="1",
                   help="with --file: factor of the frame period, or 'max' (default 1 = the sensor's frame rate)")
    p.add_argument("--window-frames", type=int, default=DEFAULT_WINDOW_FRAMES, metavar="N",
                   help=f"frames in flight before the oldest incomplete one is dropped "
                        f"(default {DEFAULT_WINDOW_FRAMES})")
    p.add_argument("--save-datagrams", metavar="PATH",
                   help="with --listen: also write every datagram to a datagram file")
    p.add_argument("--quiet", action="store_true", help="no start, per-second and summary lines (warnings and "
                                                        "dropped frames are still reported)")
    p.set_defaults(func=_run_args)
    return p
