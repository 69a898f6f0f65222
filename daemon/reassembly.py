"""Reassembly: a board's datagrams in, complete frames in the sensor's ADC format out, with counters.

Pure and I/O free (Reassembler.feed / flush); the stream layout (streamlayout.py) says where a
datagram's counter, byte offset and payload are, and converts each complete frame.

Frames: with F the frame size in stream bytes (chirps_per_frame x n_rx x samples_per_chirp x
components x bytes per sample; 3/2 bytes per sample when packed), frame k is stream bytes
[k F, (k+1) F). A payload may span frames. At most `window_frames` frames are in flight (being filled);
a datagram for a frame beyond the window gives up the oldest: a frame with missing bytes is dropped
with its reason and counted, never published half-filled. Complete frames are published in order with
`seq` = k. Datagram losses, duplicates and reordering are counted from `packet_sequence`; a stream that
restarts (its counter and byte offset jump back and keep counting from there) is followed with a new
`run` id.
"""

from __future__ import annotations

import collections
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import CubecastError
from .sensor import Sensor
from .streamlayout import FrameConverter, StreamLayout

DEFAULT_WINDOW_FRAMES = 3
MAX_WINDOW_FRAMES = 16
RESTART_PACKETS = 16  # consecutive datagrams far behind the stream, counting up: the board restarted


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
