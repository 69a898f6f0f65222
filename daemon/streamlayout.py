"""The stream layout: how a development board's UDP datagrams carry its ADC samples.

A board's capture path sends its ADC samples as a stream of UDP datagrams: each datagram is a header
(a packet counter, the byte offset of its payload in the continuous sample stream, ...) and a payload
of consecutive stream bytes. How to read such a stream is declared in a *stream layout* (TOML,
cubecast's own format; README "Stream layout", example replay_samples/example_layout.toml). This
module parses and validates the file (StreamLayout, parse_layout, load_layout), reads header fields
(HeaderField) and turns one frame's stream bytes into the sensor's ADC format (FrameConverter, pure
numpy). The frames are cut from the stream in reassembly.py; adapter.py reads and publishes.

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
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .config import Section, parse_toml, read_text
from .errors import CubecastError
from .sensor import Sensor

MEANINGS = ("packet_sequence", "byte_offset", "frame_number", "payload_size", "ignore")
FIELD_TYPES = ("uint", "int")
BYTE_ORDERS = ("little", "big")
SAMPLE_TYPES = ("int16", "packed12")
IQ_ORDERS = ("iq", "qi", "real")
MAX_DATAGRAM_BYTES = 65535  # a UDP datagram's payload cannot be larger


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


def _header_field(ft: Section, header_size: int, fields: list[HeaderField]) -> HeaderField:
    """One [[packet.field]] entry, checked against the header size and the fields before it."""
    name = ft.string("name", pattern=r"[A-Za-z0-9_.-]{1,64}", rule="must be 1..64 letters, digits, '_', '.' or '-'")
    ft.label = f"[[packet.field]] '{name}'"
    offset = ft.integer("offset_bytes", ge=0, le=MAX_DATAGRAM_BYTES - 1)
    size = ft.integer("size_bytes", ge=1, le=8)
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
    return HeaderField(name, offset, size, ftype == "int", order, meaning)


def _check_meanings(pk: Section, fields: list[HeaderField]) -> None:
    """One packet_sequence and one byte_offset field; at most one frame_number and payload_size."""
    for meaning, required in (("packet_sequence", True), ("byte_offset", True), ("frame_number", False),
                              ("payload_size", False)):
        n = sum(f.meaning == meaning for f in fields)
        if n > 1:
            raise pk.error(f"has {n} fields with meaning = {meaning!r}: at most one")
        if required and n == 0:
            what = ("a counter incremented per datagram" if meaning == "packet_sequence"
                    else "the offset of the payload in the continuous stream")
            raise pk.error(f"needs one [[packet.field]] with meaning = {meaning!r} ({what})")


def _sample_format(st: Section) -> tuple[str, str, str, tuple[str, ...]]:
    """[samples]: (type, byte order, iq order, axis order)."""
    sample_type = st.choice("type", SAMPLE_TYPES)
    if sample_type == "int16":
        sample_order = st.choice("byte_order", BYTE_ORDERS)
    else:
        if st.has("byte_order"):
            raise st.fail("byte_order", st.raw("byte_order"), "applies to int16 samples only; packed12 has "
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
    return sample_type, sample_order, iq_order, tuple(axes)


def parse_layout(text: str, origin: str | None = None) -> StreamLayout:
    """Parse and validate the text of a stream layout. Raises CubecastError naming the field, the value
    and the rule (config.py's format)."""
    doc = parse_toml(text, origin)
    doc.check_sections(("layout", "packet", "samples"), "a stream layout has [layout], [packet] and [samples]")
    pk, st = doc.section("packet"), doc.section("samples")
    lt = doc.section("layout", required=False)
    description = lt.string("description", "")
    lt.check_unknown()

    header_size = pk.integer("header_size_bytes", ge=0, le=MAX_DATAGRAM_BYTES - 1)
    entries = pk.tables("field", start=1)
    pk.check_unknown()
    fields: list[HeaderField] = []
    for ft in entries:
        fields.append(_header_field(ft, header_size, fields))
    _check_meanings(pk, fields)
    sample_type, sample_order, iq_order, axes = _sample_format(st)
    return StreamLayout(header_size, tuple(fields), sample_type, sample_order, iq_order, axes, description, origin)


def load_layout(path: str | Path) -> StreamLayout:
    return parse_layout(read_text(path, "stream layout"), str(path))


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

