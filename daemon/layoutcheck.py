"""What a board's first datagrams say about a stream layout that does not fit them. Pure, I/O free;
used by reassembly.py.

Two questions, each answered in plain words naming the layout file and the field, with the fix:

1. No stream could be followed (streamcheck.py: no RESTART_PACKETS datagrams agree): which header field
   is misread? `diagnose_fields` looks at the first DIAGNOSE_DATAGRAMS datagrams. A board's counter goes
   up by one per datagram and its byte offsets go up by the payload size per counter step (the stream
   facts of README "Stream layout"); when the declared reading of packet_sequence or byte_offset does not,
   the same bytes are read the other way round, with another size, and (offsets) in other units, and the
   reading that does is named: a counter that steps by 2^24 is a byte-swapped 4-byte counter, offsets
   that step by 2^33 are byte-swapped multiples of 512, offsets that step by a quarter of the payload
   count 4-byte words, offsets that step by a little less than the payload mean a longer header.
   Only a reading that fits is reported (never a guess): garbage between the datagrams does not make
   one up.

2. A stream is followed: does the sensor's frame of F bytes match the stream's period of frame
   boundaries? `FrameSizeCheck` watches the evidence the stream carries: the frame_number field (frame k
   holds stream bytes [k F, (k + 1) F), so frame_number - byte_offset // F must stay constant) and the
   short datagram with which a board that cuts its datagrams at frame ends closes each frame (where it
   ends, a frame ends). The first CONFIRM_FRAMES frames wait until the stream has gone CONFIRM_FRAMES
   frames on without contradiction; a contradiction (FRAME_SIZE_EVIDENCE datagrams whose frame number
   disagrees with the most common difference, or one cut where no frame ends) makes the size wrong:
   nothing more is published, and the board's own frame size is estimated for the message (half, twice,
   ... the sensor's; how many chirps of the sensor's size). A stream with neither kind of evidence cannot
   be checked; that is said once.
"""

from __future__ import annotations

import collections
from dataclasses import dataclass
from fractions import Fraction

from .streamcheck import RESTART_PACKETS
from .streamlayout import HeaderField, StreamLayout

DIAGNOSE_DATAGRAMS = 4 * RESTART_PACKETS
"""Datagrams without a stream after which the header fields are diagnosed (and the first ones kept
for it: their headers only)."""

PAIR_REACH = 4
"""Pairs of datagrams up to this many arrivals apart are compared (losses and reordering between them)."""

MIN_FITTING_PAIRS = RESTART_PACKETS // 2
"""A reading of a field is said to fit when at least this many pairs agree with it (and at least half
of the pairs the declared reading was tested on)."""

CONFIRM_FRAMES = 3
"""Frames the stream must go on without contradiction before its first frames are published."""

FRAME_SIZE_EVIDENCE = 3
"""Datagrams whose frame_number disagrees with the most common difference that make the frame size wrong
(at least a quarter of those checked): one or two corrupted headers do not stop a stream."""

MAX_FRAME_NUMBERS = 64
"""Frame numbers whose first and last byte offsets are kept for the estimate of the board's frame size."""

PENDING, CONFIRMED, UNCHECKED, WRONG = "pending", "confirmed", "unchecked", "wrong"

_RATIO_WORDS = {Fraction(1, 4): "a quarter of", Fraction(1, 3): "a third of", Fraction(1, 2): "half",
                Fraction(2, 3): "two thirds of", Fraction(3, 4): "three quarters of", Fraction(4, 3): "4/3 of",
                Fraction(3, 2): "1.5 times", Fraction(2): "twice", Fraction(3): "three times",
                Fraction(4): "four times"}


def _where(layout: StreamLayout) -> str:
    return f"layout {layout.origin}: " if layout.origin else "layout: "


def _label(f: HeaderField, size: int | None = None, order: str | None = None) -> str:
    size = f.size_bytes if size is None else size
    order = f.byte_order if order is None else order
    return f"bytes {f.offset_bytes}..{f.offset_bytes + size - 1}" + ("" if size == 1 else f", {order}-endian")


def _power_of_two(x: int) -> str:
    return f"2^{x.bit_length() - 1} = {x}" if x > 1 and x & (x - 1) == 0 else str(x)


def _shown(values: list[int], n: int = 4) -> str:
    return ", ".join(str(v) for v in values[:n]) + (", ..." if len(values) > n else "")


# ---- 1. the header fields, from the first datagrams --------------------------------------------

@dataclass
class _Reading:
    """One way of reading a header field: offset, size and byte order."""

    offset: int
    size: int
    order: str

    def values(self, headers: list[bytes]) -> list[int]:
        a, b = self.offset, self.offset + self.size
        return [int.from_bytes(h[a:b], self.order) for h in headers]


def _pairs(n: int):
    for i in range(n):
        for j in range(i + 1, min(n, i + 1 + PAIR_REACH)):
            yield i, j


def _counts(values: list[int], bits: int) -> int:
    """Pairs of datagrams (up to PAIR_REACH apart) whose counters differ by their distance in arrival,
    or by 1: a counter that goes up by one per datagram."""
    mod = 1 << bits
    return sum(1 for i, j in _pairs(len(values)) if (values[j] - values[i]) % mod in (1, j - i))


def _steps(seq: list[int], bits: int) -> list[int]:
    """Counter steps from the first datagram (signed, wrapped at `bits`)."""
    mod = 1 << bits
    out = []
    for v in seq:
        d = (v - seq[0]) % mod
        out.append(d - mod if d >= mod >> 1 else d)
    return out


def _on_grid(offsets: list[int], steps: list[int], lengths: list[int], payload: int, bits: int,
             unit: Fraction = Fraction(1)) -> tuple[int, int]:
    """(pairs whose byte offsets, times `unit`, differ by their counter step times the payload size;
    pairs tested: those with a counter step of 1..PAIR_REACH and a full-size payload at the first)."""
    mod = 1 << bits
    fit = tested = 0
    for i, j in _pairs(len(offsets)):
        d = steps[j] - steps[i]
        if not 0 < d <= PAIR_REACH or lengths[i] != payload:
            continue
        tested += 1
        moved = Fraction((offsets[j] - offsets[i]) % mod) * unit
        fit += moved == d * payload
    return fit, tested


def _regular_step(offsets: list[int], steps: list[int], bits: int) -> int | None:
    """The byte offsets' step per counter step, if one step is common to most consecutive pairs."""
    mod = 1 << bits
    found = collections.Counter()
    for i in range(len(offsets) - 1):
        d = steps[i + 1] - steps[i]
        if d == 1:
            found[(offsets[i + 1] - offsets[i]) % mod] += 1
    if not found:
        return None
    step, n = found.most_common(1)[0]
    return step if n >= MIN_FITTING_PAIRS and step > 0 else None


def _variants(f: HeaderField, header_size: int):
    """Other readings of the field's bytes: the other byte order first, then other sizes at the same
    offset (each byte order)."""
    other = "big" if f.byte_order == "little" else "little"
    if f.size_bytes > 1:
        yield _Reading(f.offset_bytes, f.size_bytes, other), "byte-swapped"
    for size in (1, 2, 3, 4, 6, 8):
        if size != f.size_bytes and f.offset_bytes + size <= header_size:
            for order in ((f.byte_order, other) if size > 1 else (f.byte_order,)):
                yield _Reading(f.offset_bytes, size, order), "mis-sized"


def _fix(f: HeaderField, r: _Reading) -> str:
    changes = []
    if r.size != f.size_bytes:
        changes.append(f"size_bytes = {r.size}")
    if r.order != f.byte_order and r.size > 1:
        changes.append(f'byte_order = "{r.order}"')
    return "set " + " and ".join(changes)


def _payload_lengths(layout: StreamLayout, headers: list[bytes], lengths: list[int]) -> list[int]:
    h = layout.header_size_bytes
    size_f = layout.field("payload_size")
    if size_f is None:
        return [n - h for n in lengths]
    sizes = _Reading(size_f.offset_bytes, size_f.size_bytes, size_f.byte_order).values(headers)
    return [s if h + s <= n else n - h for s, n in zip(sizes, lengths)]


def _diagnose_counter(layout: StreamLayout, headers: list[bytes]) -> tuple[list[str], list[int]]:
    """(findings about packet_sequence, the counter values to judge the offsets by: the declared reading
    if it counts, else the one found, else the arrival order)."""
    f = layout.field("packet_sequence")
    declared = _Reading(f.offset_bytes, f.size_bytes, f.byte_order)
    values = declared.values(headers)
    if _counts(values, f.bits) >= MIN_FITTING_PAIRS:
        return [], _steps(values, f.bits)
    steps = [(values[i + 1] - values[i]) % (1 << f.bits) for i in range(len(values) - 1)]
    common = collections.Counter(steps).most_common(1)[0][0] if steps else 0
    seen = (f"steps by {_power_of_two(common)} per datagram" if common else "stays the same") \
        + f" ({_shown(values)})"
    if common and f.size_bytes > 1 and common % (1 << (8 * (f.size_bytes - 1))) == 0:
        seen += ", as a byte-swapped counter does"
    head = f"{_where(layout)}[[packet.field]] '{f.name}' (packet_sequence, {_label(f)}) {seen}"
    for r, kind in _variants(f, layout.header_size_bytes):
        alt = r.values(headers)
        if _counts(alt, 8 * r.size) >= MIN_FITTING_PAIRS:
            how = "read the other way round" if kind == "byte-swapped" else f"read as {r.size} bytes"
            return ([f"{head}; {how} ({_label(f, r.size, r.order)}) it counts {_shown(alt)}, +1 per datagram: "
                     f"{_fix(f, r)}"], _steps(alt, 8 * r.size))
    where = _counter_elsewhere(layout, headers)
    hint = (f"; {where[0]} count up by one per datagram ({_shown(where[1])}): is the counter there?" if where
            else "; no bytes of the header count up by one per datagram")
    return [head + ": a packet counter goes up by one per datagram" + hint], list(range(len(headers)))


def _counter_elsewhere(layout: StreamLayout, headers: list[bytes]) -> tuple[str, list[int]] | None:
    """Bytes of the header, other than the declared counter, that count up by one per datagram."""
    h = layout.header_size_bytes
    for size in (4, 2, 8, 1):
        for off in range(0, h - size + 1):
            for order in ("little", "big") if size > 1 else ("little",):
                vals = _Reading(off, size, order).values(headers)
                if len(set(vals)) > 2 and _counts(vals, 8 * size) >= MIN_FITTING_PAIRS:
                    where = f"bytes {off}..{off + size - 1}" + (f" read {order}-endian" if size > 1 else "")
                    return where, vals
    return None


def _diagnose_offset(layout: StreamLayout, headers: list[bytes], steps: list[int],
                     payloads: list[int]) -> list[str]:
    f = layout.field("byte_offset")
    payload = collections.Counter(payloads).most_common(1)[0][0]
    declared = _Reading(f.offset_bytes, f.size_bytes, f.byte_order)
    values = declared.values(headers)
    fit, tested = _on_grid(values, steps, payloads, payload, f.bits)
    if not tested or fit * 2 >= tested:
        return []
    head = (f"{_where(layout)}[[packet.field]] '{f.name}' (byte_offset, {_label(f)}) reads {_shown(values)}: "
            f"not {payload} bytes further per counter step, as payloads of {payload} bytes are")
    for r, kind in _variants(f, layout.header_size_bytes):
        alt = r.values(headers)
        fit, tested = _on_grid(alt, steps, payloads, payload, 8 * r.size)
        if fit >= MIN_FITTING_PAIRS and fit * 2 >= tested:
            how = ("byte-swapped offsets look like that; read the other way round" if kind == "byte-swapped"
                   else f"read as {r.size} bytes")
            return [f"{head}; {how} ({_label(f, r.size, r.order)}) they are {_shown(alt)}: {_fix(f, r)}"]
    step = _regular_step(values, steps, f.bits)
    if step is None:
        return [head + "; no reading of its bytes gives such offsets: is the byte offset elsewhere in the header?"]
    unit = Fraction(payload, step)
    if unit.denominator == 1 and unit > 1 and unit in (2, 4, 8):
        return [f"{head}; they step by {step}, 1/{unit} of the payload: the board counts {unit}-byte words, "
                f"but cubecast needs the offset in bytes (a setting of the board's capture path?)"]
    h = layout.header_size_bytes
    end = max(x.offset_bytes + x.size_bytes for x in layout.fields)
    if step < payload:
        return [f"{head}; they step by {step}: if the header were {h + payload - step} bytes "
                f"(header_size_bytes = {h + payload - step}), the payloads would be {step} bytes and fit"]
    if h - (step - payload) >= end:
        return [f"{head}; they step by {step}: if the header were {h - (step - payload)} bytes "
                f"(header_size_bytes = {h - (step - payload)}), the payloads would be {step} bytes and fit"]
    return [f"{head}; they step by {step} per datagram: check header_size_bytes and payload_size"]


def _diagnose_payload_size(layout: StreamLayout, headers: list[bytes], lengths: list[int]) -> tuple[list[str],
                                                                                                    list[int]]:
    """(findings about payload_size, the payload lengths to judge the offsets by: those of the reading found)."""
    f = layout.field("payload_size")
    payloads = _payload_lengths(layout, headers, lengths)
    if f is None:
        return [], payloads
    h = layout.header_size_bytes
    values = _Reading(f.offset_bytes, f.size_bytes, f.byte_order).values(headers)
    room = [n - h for n in lengths]
    if sum(v > r for v, r in zip(values, room)) * 2 <= len(values):
        return [], payloads
    head = (f"{_where(layout)}[[packet.field]] '{f.name}' (payload_size, {_label(f)}) reads {_shown(values)} "
            f"for datagrams with {_shown(room)} bytes after the {h}-byte header")
    for r, kind in _variants(f, h):
        alt = r.values(headers)
        if all(0 < v <= n for v, n in zip(alt, room)):
            how = "read the other way round" if kind == "byte-swapped" else f"read as {r.size} bytes"
            return [f"{head}; {how} ({_label(f, r.size, r.order)}) it is {_shown(alt)}: {_fix(f, r)}"], alt
    return [head + ": check payload_size and header_size_bytes"], payloads


def diagnose_fields(layout: StreamLayout, headers: list[bytes], lengths: list[int]) -> list[str]:
    """What the first datagrams (their `headers`, each header_size_bytes long, and their lengths) say about
    the layout's packet_sequence, byte_offset and payload_size fields: one plain sentence per field that
    is misread, naming the layout file, the field and the fix; [] when nothing is found."""
    if len(headers) < RESTART_PACKETS:
        return []
    out, payloads = _diagnose_payload_size(layout, headers, lengths)
    found, steps = _diagnose_counter(layout, headers)
    out += found
    out += _diagnose_offset(layout, headers, steps, payloads)
    return out


# ---- 2. the frame size, from the stream ----------------------------------------------------------

class FrameSizeCheck:
    """Whether the sensor's frame of `frame_bytes` matches the stream's period of frame boundaries (module
    docstring). Fed with the stream's used datagrams (`datagram`) and cuts (`cut`); `state` is PENDING
    (the first frames wait), CONFIRMED, UNCHECKED (the stream carries no evidence: published unchecked)
    or WRONG. Memory: at most MAX_FRAME_NUMBERS frame numbers and as many differences."""

    def __init__(self, frame_bytes: int, fn_bits: int | None, payload: int):
        self.frame_bytes, self.payload = frame_bytes, payload
        self.fn_mod = (1 << fn_bits) if fn_bits else 0
        self.state = PENDING
        self.first_frame: int | None = None
        self.first_offset: int | None = None
        self.first_fn: int | None = None
        self.diffs: collections.Counter = collections.Counter()
        self.checked = 0
        self.spans: dict[int, list[int]] = {}  # frame number - the first -> [first, last] byte offset
        self.cuts: list[int] = []  # where the board cut its datagrams (the first two)
        self.spanned = False  # a datagram ran on across one of the sensor's frame ends (no cut there)
        self.framecut = False  # the board cut at the sensor's frame ends (evidence for the size)
        self.reported = False

    @property
    def contradictions(self) -> int:
        return self.checked - (self.diffs.most_common(1)[0][1] if self.diffs else 0)

    def datagram(self, off: int, length: int, fn: int | None) -> None:
        """A used datagram of the stream: (unwrapped) byte offset `off`, payload `length`, its frame_number
        field (None without one)."""
        F = self.frame_bytes
        k = off // F
        if self.first_frame is None:
            self.first_frame, self.first_offset, self.first_fn = k, off, fn
        if length and (off + length - 1) // F != k:
            self.spanned = True
            if self.cuts:
                self.state = WRONG
        if fn is not None:
            self._frame_number(off, k, fn)
        if self.state == PENDING and k >= self.first_frame + CONFIRM_FRAMES:
            evidence = (fn is not None and 4 * self.contradictions < self.checked) or self.framecut
            self.state = CONFIRMED if evidence else UNCHECKED

    def _frame_number(self, off: int, k: int, fn: int) -> None:
        self.checked += 1
        d = (fn - k) % self.fn_mod
        if d in self.diffs or len(self.diffs) < MAX_FRAME_NUMBERS:
            self.diffs[d] += 1
        rel = (fn - self.first_fn) % self.fn_mod
        span = self.spans.get(rel)
        if span is not None:
            span[0], span[1] = min(span[0], off), max(span[1], off)
        elif len(self.spans) < MAX_FRAME_NUMBERS:
            self.spans[rel] = [off, off]
        c = self.contradictions
        if c >= FRAME_SIZE_EVIDENCE and 4 * c >= self.checked:
            self.state = WRONG

    def cut(self, end: int) -> None:
        """The board ended a short datagram at byte `end` and went on there with the next counter: a frame
        of the board ends there. Wrong if no frame of frame_bytes ends there, or if the board went on
        across one of the sensor's frame ends before (it cuts at its own frame ends only)."""
        if len(self.cuts) < 2:
            self.cuts.append(end)
        if end % self.frame_bytes or self.spanned:
            self.state = WRONG
        else:
            self.framecut = True

    def estimate(self) -> tuple[float, float, str] | None:
        """The board's frame size as the evidence gives it: (bytes, +- bytes, what it is from; a negative
        +- marks a lower bound), or None."""
        if self.cuts:
            if len(self.cuts) > 1:
                return float(self.cuts[1] - self.cuts[0]), 0.0, "where it cuts its datagrams"
            start = self.first_offset or 0
            return float(self.cuts[0] - start), 0.0, ("if the stream began at a frame start"
                                                      + (f" (byte {start})" if start else ""))
        # a frame boundary lies between the last offset of frame number a and the first of a + 1
        bounds = [(a, self.spans[a][1], self.spans[a + 1][0]) for a in sorted(self.spans)
                  if a + 1 in self.spans and self.spans[a][1] < self.spans[a + 1][0]]
        if len(bounds) >= 2:
            (a0, lo0, hi0), (a1, lo1, hi1) = bounds[0], bounds[-1]
            n = a1 - a0
            low, high = (lo1 - hi0) / n, (hi1 - lo0) / n
            return (low + high) / 2.0, (high - low) / 2.0, "by its frame_number field"
        if self.spans:
            first = min(x for x, _ in self.spans.values())
            return float(max(y for _, y in self.spans.values()) - first + 1) / len(self.spans), -1.0, \
                "by its frame_number field"
        return None


def _ratio_words(board: float, sensor: int, tolerance: float) -> str:
    """', half the sensor's' (the simple ratio nearest to board / sensor, if within the tolerance)."""
    r, words = min(_RATIO_WORDS.items(), key=lambda rw: abs(board - float(rw[0]) * sensor))
    return f", {words} the sensor's" if abs(board - float(r) * sensor) <= max(tolerance, 0.5) else ""


def describe_frame_mismatch(layout: StreamLayout, sensor, frame_bytes: int, check: FrameSizeCheck) -> str:
    """The plain-words message of a WRONG frame size: what the sensor says, what the stream shows, the fix."""
    chirp_bytes = frame_bytes // sensor.chirps_per_frame
    fn = layout.field("frame_number")
    ours = (f"sensor '{sensor.sensor_id}' has frames of {frame_bytes} stream bytes ({sensor.chirps_per_frame} chirps "
            f"x {sensor.n_rx} RX x {sensor.samples_per_chirp} samples, {chirp_bytes} bytes a chirp, "
            f"[samples] type = {layout.sample_type!r} in the layout)")
    if fn is not None and fn.size_bytes > 1 and len(check.spans) > 1:
        unit = 1 << (8 * (fn.size_bytes - 1))
        steps = sorted(k for k in check.spans if k)
        if all(k % unit == 0 for k in steps):
            return (f"{_where(layout)}[[packet.field]] '{fn.name}' (frame_number, {_label(fn)}) steps by "
                    f"{_power_of_two(steps[0])} from frame to frame, as a byte-swapped frame number does: set "
                    f'byte_order = "{"big" if fn.byte_order == "little" else "little"}"; frames are not published')
    est = check.estimate()
    if check.cuts:
        seen = (f"the board cuts its datagrams at byte {check.cuts[0]}, where no such frame ends"
                if check.cuts[0] % frame_bytes else
                f"the board cuts its datagrams at byte {check.cuts[0]} but not at the frame ends before it")
    else:
        seen = (f"the frame_number field '{fn.name}' ({_where(layout).rstrip(': ')}) disagrees with byte_offset "
                f"// {frame_bytes} in {check.contradictions} of {check.checked} datagrams")
    fix = ("set [frame] chirps_per_frame in the sensor description to the board's, or the board's to "
           f"{sensor.chirps_per_frame}")
    if est is not None:
        size, pm, how = est
        if pm < 0:
            seen += f": its frames are longer than {size:.0f} bytes {how}"
        else:
            seen += (f": its frames are {size:.0f} bytes" + (f" (+-{pm:.0f})" if pm else "") + f" {how}"
                     + _ratio_words(size, frame_bytes, pm))
            chirps = size / chirp_bytes
            if abs(chirps - round(chirps)) * chirp_bytes <= max(pm, 0.5) and round(chirps) >= 1:
                fix = (f"the board sends {round(chirps)} chirps of this size a frame: set [frame] chirps_per_frame = "
                       f"{round(chirps)} in the sensor description, or the board's chirps per frame to "
                       f"{sensor.chirps_per_frame}")
    return f"{ours}, but {seen}; {fix}; frames are not published"
