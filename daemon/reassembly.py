"""Reassembly: a board's datagrams in, complete frames in the sensor's ADC format out, with counters.

Pure and I/O free (Reassembler.feed / flush); the stream layout (streamlayout.py) says where a
datagram's counter, byte offset and payload are, and converts each complete frame.

Frames: with F the frame size in stream bytes (chirps_per_frame x n_rx x samples_per_chirp x
components x bytes per sample; 3/2 bytes per sample when packed), frame k is stream bytes
[k F, (k+1) F). A payload may span frames. At most `window_frames` frames are in flight (being filled);
a datagram for a frame beyond the window gives up the oldest: a frame with missing bytes is dropped
with its reason and counted, never published half-filled. Complete frames are published in order with
`seq` = k. Datagram losses, duplicates and reordering are counted from `packet_sequence`.

Trust: no header field is taken on its word (streamcheck.py). A stream is followed once RESTART_PACKETS
datagrams agree (distinct counters, byte offsets on one payload grid); from then on a datagram is used
only if it fits the stream: payload at most the stream's size, counter at most MAX_COUNTER_STEP ahead
and inside the reordering window behind, byte offset exactly where the grid puts its counter. The
others are held as possible evidence of a new stream and, unless RESTART_PACKETS of them agree with
each other (the board restarted: followed with a new `run` id, the held datagrams replayed), counted
by their reason. Bytes once placed in a frame are never overwritten.

Layout checks (layoutcheck.py): when no stream can be followed after DIAGNOSE_DATAGRAMS datagrams (or at
the end), the first datagrams' headers say which field is misread (byte-swapped, mis-sized, other
units): `layout_errors`. Once a stream is followed, its first frames wait until the stream confirms the
sensor's frame size (frame_number field, cuts at frame ends); a frame size the stream contradicts
publishes nothing more (frames counted dropped as "frame_size"), and `layout_errors` names the board's
own frame size. A stream with no such evidence is published unchecked (an
"unchecked" event says so once).
"""

from __future__ import annotations

import collections
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import CubecastError
from .layoutcheck import (DIAGNOSE_DATAGRAMS, PENDING, UNCHECKED, WRONG, FrameSizeCheck, describe_frame_mismatch,
                          diagnose_fields)
from .sensor import Sensor
from .streamcheck import (COUNTER, EXPIRE_EVERY, LATE, MAX_COUNTER_STEP, MAX_COUNTER_WINDOW, MAX_HELD_AGE,
                          MIN_COUNTER_WINDOW, OFFSET, RESTART_PACKETS, SIZE, UNCONFIRMED, UNDECIDED, Evidence,
                          Held, on_grid, signed_step)
from .streamlayout import FrameConverter, StreamLayout

DEFAULT_WINDOW_FRAMES = 3
MAX_WINDOW_FRAMES = 16


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
    """Classifies (unwrapped) datagram counters: new (ahead of all seen), reordered (behind the highest
    but never seen), duplicate (seen already), behind (older than the window: cannot tell). A number
    skipped over counts as lost once it falls out of the window without arriving (or at `finish`).
    Memory: at most `window` numbers (window <= 2**(bits-1) - 1, so wrapped counters unwrap uniquely)."""

    def __init__(self, bits: int, window: int):
        self.window = max(1, min(window, (1 << bits) // 2 - 1))
        self.first: int | None = None
        self.hi: int | None = None
        self._order: collections.deque = collections.deque()
        self._missing: set[int] = set()
        self._early: set[int] = set()
        self.reordered = self.duplicates = self.lost = 0

    def classify(self, s: int) -> str:
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

    def sizes(self) -> tuple[int, int, int]:
        """(numbers awaited, numbers missing, early numbers seen): each at most `window`."""
        return len(self._order), len(self._missing), len(self._early)

    def finish(self) -> None:
        """The stream ended (or restarted): every number still missing is lost."""
        self.lost += len(self._missing)
        self._missing.clear()
        self._order.clear()


class Reassembler:
    """Datagrams in (feed), complete frames in the sensor's ADC format out, in order, with counters.
    Pure and I/O free; not thread-safe. Memory: `window_frames` frame buffers, reused; at most
    MAX_HELD_DATAGRAMS datagrams held (streamcheck.py); a counter window of at most MAX_COUNTER_WINDOW.

    Counters: every datagram is counted once, as malformed (by `malformed_reasons`), implausible (by
    `implausible_reasons`), a duplicate, late, or used (its payload went into a frame in flight); until
    then it is `held` (a gauge): packets == malformed + implausible + duplicates + late + used + held."""

    COUNTERS = ("packets", "payload_bytes", "malformed", "implausible", "duplicates", "reordered", "lost",
                "late", "used", "frames_complete", "frames_dropped", "missing_bytes", "frame_number_mismatches",
                "restarts")

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
        self._read_seq, self._seq_bits, self._seq_mod = seq_f.reader(), seq_f.bits, 1 << seq_f.bits
        self._read_off, self._off_mod = off_f.reader(), 1 << off_f.bits
        self._read_size = size_f.reader() if size_f else None
        self._read_fn = fn_f.reader() if fn_f else None
        self._fn_mod = (1 << fn_f.bits) if fn_f else 0
        self.max_step = min(MAX_COUNTER_STEP, self._seq_mod // 2 - 1)
        self._pool = [_Slot(self.frame_bytes) for _ in range(window_frames)]
        self.counters: dict[str, int] = {k: 0 for k in self.COUNTERS}
        self.drop_reasons: collections.Counter = collections.Counter()
        self.malformed_reasons: collections.Counter = collections.Counter()
        self.implausible_reasons: collections.Counter = collections.Counter()
        self.events: collections.deque = collections.deque(maxlen=256)  # (kind, text) for the caller's log
        self.epoch = 0
        self.first_header: dict[str, int] | None = None
        self.evidence = Evidence(self.frame_bytes, seq_f.bits, off_f.bits)
        self._replay: collections.deque = collections.deque()
        self._arrivals = 0
        self._first: list[tuple[bytes, int]] | None = []  # (header, length) of the first datagrams; None: done
        self.field_errors: list[str] = []  # header fields misread (from the first datagrams)
        self.frame_size_error: str | None = None  # the sensor's frame size, contradicted by the stream
        self._pending: list[AssembledFrame] = []  # complete frames waiting for the frame size's confirmation
        self._wrong_at = 0  # the datagram count at which the frame size was found wrong
        self._told_unchecked = False
        self._reset()

    def _reset(self) -> None:
        self.payload: int | None = None  # the stream's payload size; None: no stream established
        self.base: int | None = None  # the oldest frame not yet published or dropped
        self.slots: dict[int, _Slot] = {}
        self.seqs: SequenceTracker | None = None
        self._anchor_seq = self._anchor_off = 0  # the highest counter used (unwrapped) and its byte offset
        self._step = self._off = 0  # _judge's result: step from the anchor, unwrapped byte offset
        self.grid = UNDECIDED  # streamcheck: continuous, or cut at frame ends (told apart at a frame end)
        self._fn_diff: int | None = None
        self._anchor_len = 0  # payload length of the anchor datagram
        self.frame_check: FrameSizeCheck | None = None

    # -- public ---------------------------------------------------------------------------------
    def feed(self, datagram, arrival_s: float = 0.0) -> list[AssembledFrame]:
        """Take one datagram (bytes-like; not kept after the call unless held, then as a copy). Returns
        the frames completed by it (usually none or one), oldest first."""
        out: list[AssembledFrame] = []
        self.counters["packets"] += 1
        self._arrivals += 1
        self._feed(memoryview(datagram), arrival_s, out, None)
        if self._replay:
            self._run_replay(out)
        if self._first is not None and len(self._first) >= DIAGNOSE_DATAGRAMS:
            self._diagnose()
        if self.evidence.held and self._arrivals % EXPIRE_EVERY == 0:
            self.evidence.expire(self._arrivals - MAX_HELD_AGE, self._give_up)
        return out

    def flush(self, reason: str = "the stream ended") -> list[AssembledFrame]:
        """End of the stream: with no stream established, follow the grid with most datagrams (at least
        two); publish what is complete, drop what is not, count what is still held by its reason, settle
        the losses."""
        out: list[AssembledFrame] = []
        if self.payload is None:
            best = self.evidence.longest()
            if best is not None and len(best.items) >= 2:  # a lone datagram agrees with nothing
                self._establish(best, out)
                self._run_replay(out)
        if self._first is not None:
            self._diagnose()
        for item in self.evidence.take_all():
            self._give_up(item)
        self._finish(out, reason)
        return out

    @property
    def layout_errors(self) -> list[str]:
        """What cannot be right about the layout or the sensor's frame size, in plain words (layoutcheck.py)."""
        return self.field_errors + ([self.frame_size_error] if self.frame_size_error else [])

    def stats(self) -> dict:
        s: dict[str, Any] = dict(self.counters)
        s["drop_reasons"] = dict(self.drop_reasons)
        s["malformed_reasons"] = dict(self.malformed_reasons)
        s["implausible_reasons"] = dict(self.implausible_reasons)
        if self.seqs is not None:
            s["duplicates"] += self.seqs.duplicates
            s["reordered"] += self.seqs.reordered
            s["lost"] += self.seqs.lost
        s["held"] = self.evidence.held
        s["held_bytes"] = self.evidence.held_bytes
        s["frames_in_flight"] = len(self.slots)
        s["frame_bytes"] = self.frame_bytes
        s["stream_payload_bytes"] = self.payload
        return s

    # -- one datagram ---------------------------------------------------------------------------
    def _malformed(self, reason: str, text: str) -> None:
        self.counters["malformed"] += 1
        self.malformed_reasons[reason] += 1
        self.events.append(("malformed", text))

    def _feed(self, dg: memoryview, t: float, out: list, item: Held | None) -> None:
        """`item`: the datagram is being replayed (held before)."""
        n = dg.nbytes
        h = self.header_size
        if n < h:
            self._malformed("short", f"a datagram of {n} bytes is shorter than header_size_bytes = {h}")
            return
        seq_raw = self._read_seq(dg)
        off_raw = self._read_off(dg)
        if self.first_header is None:
            self.first_header = {f.name: f.shown(f.reader()(dg)) for f in self.layout.fields}
            self.first_header["datagram_bytes"] = n
        if self._first is not None and item is None and len(self._first) < DIAGNOSE_DATAGRAMS:
            self._first.append((bytes(dg[:h]), n))
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
        reason = self._judge(seq_raw, off_raw, length, item is None, out)
        if reason is not None:
            self._hold(dg, t, reason, seq_raw, off_raw, length, item, out)
            return
        self._use(self._anchor_seq + self._step, self._off, dg, payload, t, out)

    def _judge(self, seq_raw: int, off_raw: int, length: int, tell: bool, out: list) -> str | None:
        """None if the datagram fits the stream (its step from the anchor in self._step, its unwrapped
        byte offset in self._off), else the reason it does not (an event text too, if `tell`)."""
        P = self.payload
        if P is None:
            return UNCONFIRMED
        if length > P:
            if tell:
                self.events.append(("implausible", f"datagram counter {seq_raw}: a payload of {length} bytes, "
                                                   f"longer than the stream's {P}-byte payloads"))
            return SIZE
        d = signed_step(self._anchor_seq, seq_raw, self._seq_mod)
        off, grid = on_grid(self._anchor_off, d, P, self.frame_bytes, off_raw, self._off_mod, self.grid)
        hi_known = self.seqs is not None and self.seqs.hi is not None
        behind = d <= -self.seqs.window if hi_known else d < -self.max_step
        if d > self.max_step or behind:
            if off >= 0 and behind:
                return LATE
            if tell:
                where = (f"{d} ahead of the stream's ({self._anchor_seq % self._seq_mod}; at most {self.max_step})"
                         if d > 0 else f"{-d} behind the stream's ({self._anchor_seq % self._seq_mod}), older than "
                                       f"its window of {self.seqs.window if hi_known else self.max_step}")
                self.events.append(("implausible", f"datagram counter {seq_raw} is {where}"))
            return COUNTER
        if off < 0:
            end = self._anchor_off + self._anchor_len
            if d == 1 and 0 < self._anchor_len < P and (off_raw - end) % self._off_mod == 0:
                self._frame_evidence(out, lambda c: c.cut(end))  # the board cut where no frame of ours ends
            if tell:
                expect = (self._anchor_off + d * P) % self._off_mod
                self.events.append(("implausible", f"datagram counter {seq_raw} carries byte_offset {off_raw}; "
                                                   f"the stream puts that counter at byte {expect} (payloads of {P} "
                                                   f"bytes; check byte_offset and the sensor's frame size)"))
            return OFFSET
        self._step, self._off, self.grid = d, off, grid
        return None

    def _use(self, s: int, off: int, dg: memoryview, payload: memoryview, t: float, out: list) -> None:
        cls = self.seqs.classify(s)
        length = payload.nbytes
        if cls == NEW:
            end = self._anchor_off + self._anchor_len
            if s == self._anchor_seq + 1 and 0 < self._anchor_len < self.payload and off == end:
                self._frame_evidence(out, lambda c: c.cut(end))  # a cut on the grid (at one of our frame ends)
            self._anchor_seq, self._anchor_off, self._anchor_len = s, off, length
        if cls == DUPLICATE:
            if length:
                self._place(off, payload, t, out)  # fills only bytes no datagram has filled yet
            return
        if cls == BEHIND:  # not after _judge (the anchor is the highest counter); counted late if it were
            self.counters["late"] += 1
            return
        self.counters["payload_bytes"] += length
        F = self.frame_bytes
        fn = self._read_fn(dg) if self._read_fn is not None else None
        if fn is not None:
            d = (fn - off // F) % self._fn_mod
            if self._fn_diff is None:
                self._fn_diff = d
            elif d != self._fn_diff:
                self.counters["frame_number_mismatches"] += 1
                by = signed_step(self._fn_diff, d, self._fn_mod)
                if self.counters["frame_number_mismatches"] == 1:  # the first tells; the count says how many
                    self.events.append(("frame_number", f"datagram at byte offset {off} carries frame_number {fn}, "
                                                        f"off by {by:+d} from the frame its offset gives with frames "
                                                        f"of {F} bytes"))
        self._frame_evidence(out, lambda c: c.datagram(off, length, fn))
        used = self._place(off, payload, t, out) if length else True
        self.counters["used" if used else "late"] += 1

    # -- held datagrams, new streams --------------------------------------------------------------
    def _hold(self, dg: memoryview, t: float, reason: str, seq_raw: int, off_raw: int, length: int,
              item: Held | None, out: list) -> None:
        if item is None:
            item = Held(self._arrivals, bytes(dg), t, reason, seq_raw, off_raw, length)
        else:
            item.reason = reason
        winner = self.evidence.offer(item, self._give_up)
        if winner is not None:
            self._establish(winner, out)

    def _give_up(self, item: Held) -> None:
        """Count a held datagram that will not be used, by the reason the stream gave it."""
        if item.reason == LATE:
            self.counters["late"] += 1
            return
        self.counters["implausible"] += 1
        self.implausible_reasons[item.reason] += 1
        if item.reason == UNCONFIRMED:
            self.events.append(("unconfirmed", f"no stream yet: {self.counters['packets']} datagrams, no "
                                               f"{RESTART_PACKETS} of them with distinct counters on one payload "
                                               "grid (counter +1 and byte offset + payload size per datagram); "
                                               "check the layout's packet_sequence and byte_offset fields"))

    def _establish(self, c, out: list) -> None:
        """Follow the grid `c` (a restart if a stream was followed), then replay every held datagram."""
        if self.payload is not None:
            old = (self._anchor_seq % self._seq_mod, self._anchor_off % self._off_mod)
            self._finish(out, "the stream restarted")
            self.counters["restarts"] += 1
            self.epoch += 1
            self.events.append(("restart", f"the stream restarted: {len(c.items)} datagrams agree from counter "
                                           f"{c.seq}, byte offset {c.off} (the stream was at counter {old[0]}, "
                                           f"byte offset {old[1]}); new run"))
        self.payload = c.payload
        self._anchor_seq, self._anchor_off, self._anchor_len = c.seq, c.off, 0
        fn_f = self.layout.field("frame_number")
        self.frame_check = FrameSizeCheck(self.frame_bytes, fn_f.bits if fn_f else None, c.payload)
        per_frame = -(-self.frame_bytes // c.payload)
        window = min(MAX_COUNTER_WINDOW, max(MIN_COUNTER_WINDOW, (self.window + 1) * per_frame))
        self.seqs = SequenceTracker(self._seq_bits, window)
        pending = self.evidence.take_all() + list(self._replay)
        pending.sort(key=lambda it: it.arrival)
        self._replay = collections.deque(pending)

    def _run_replay(self, out: list) -> None:
        """Feed the held datagrams again, oldest first (a new stream found during this starts over with
        what is left: each round uses at least the new stream's first datagram, so this ends)."""
        while self._replay:
            item = self._replay.popleft()
            self._feed(memoryview(item.data), item.t, out, item)

    # -- the layout checks (layoutcheck.py) --------------------------------------------------------
    def _diagnose(self) -> None:
        """After the first DIAGNOSE_DATAGRAMS datagrams (or at the end): if no stream was followed, or the
        one followed used fewer than half of them, which header field is misread?"""
        first, self._first = self._first, None
        if self.payload is not None and 2 * self.counters["used"] >= self.counters["packets"]:
            return
        found = diagnose_fields(self.layout, [h for h, _ in first], [n for _, n in first])
        if found:
            self.field_errors = found

    def _frame_evidence(self, out: list, step) -> None:
        """Give the frame-size check one piece of evidence (`step(check)`); publish the waiting frames once
        it is confirmed (or cannot be checked), drop them once it is wrong, and report."""
        chk = self.frame_check
        if chk is None:
            return
        before = chk.state
        step(chk)
        if chk.state == UNCHECKED and before == PENDING and self.frame_size_error is not None:
            chk.state, chk.reported = WRONG, True  # contradicted in this run before, and nothing to say otherwise
        if chk.state != before and before == PENDING and chk.state != WRONG:
            self.frame_size_error = None  # a new stream (the board set up again) that fits
            self._publish_pending(out)
            if chk.state == UNCHECKED and not self._told_unchecked:
                self._told_unchecked = True
                self.events.append(("unchecked", f"the frame size of {self.frame_bytes} bytes cannot be checked "
                                                  "against the stream: no frame_number field, and the board does "
                                                  "not cut its datagrams at frame ends"))
        if chk.state == WRONG and before != WRONG:
            self._wrong_at = self.counters["packets"]
            self._drop_pending()
        if chk.state == WRONG and not chk.reported:
            self._report_frame_size(False)

    def _report_frame_size(self, final: bool) -> None:
        """The plain-words report of a wrong frame size, once the board's own size is estimated (or at
        the end of the stream, or DIAGNOSE_DATAGRAMS datagrams after it was found wrong)."""
        chk = self.frame_check
        est = chk.estimate()
        precise = est is not None and 0 <= est[1] <= self.frame_bytes / self.sensor.chirps_per_frame / 2
        if not final and not precise and self.counters["packets"] - self._wrong_at < DIAGNOSE_DATAGRAMS:
            return
        chk.reported = True
        if self.frame_size_error is None:  # the first report stands (a restart of a wrong stream repeats it)
            self.frame_size_error = describe_frame_mismatch(self.layout, self.sensor, self.frame_bytes, chk)

    def _publish_pending(self, out: list) -> None:
        self.counters["frames_complete"] += len(self._pending)
        out.extend(self._pending)
        self._pending.clear()

    def _drop_pending(self) -> None:
        for _ in self._pending:
            self._count_drop("frame_size")
        self._pending.clear()

    def _count_drop(self, reason: str) -> None:
        self.counters["frames_dropped"] += 1
        self.drop_reasons[reason] += 1

    # -- frames ---------------------------------------------------------------------------------
    def _finish(self, out: list, reason: str) -> None:
        if self.slots:
            self._advance(max(self.slots) + 1, out, reason)
        chk = self.frame_check
        if chk is not None and chk.state == WRONG:
            self._drop_pending()
            if not chk.reported:
                self._report_frame_size(True)
        else:
            self._publish_pending(out)
        if self.seqs is not None:
            self.seqs.finish()
            for k in ("duplicates", "reordered", "lost"):
                self.counters[k] += getattr(self.seqs, k)
        self._reset()

    def _place(self, off: int, payload: memoryview, t: float, out: list) -> bool:
        """Copy the payload's bytes into the frames in flight (bytes already filled stay as they are).
        Returns whether any part fell inside the window."""
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
                filled = int(np.count_nonzero(seg))
                if filled == 0:
                    slot.view[within:within + n] = payload[pos:pos + n]
                elif filled < n:  # a partial overlap: copy only the new bytes (rare, allocates)
                    np.copyto(slot.data[within:within + n], np.frombuffer(payload[pos:pos + n], np.uint8),
                              where=~seg)
                if filled < n:
                    seg[:] = True
                    slot.received += n - filled
                used = True
            pos += n
        self._drain(out)
        return used

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
        state = self.frame_check.state if self.frame_check is not None else None
        if slot.received == F and state == WRONG:
            self._count_drop("frame_size")  # whole, but not a frame of this sensor
        elif slot.received == F:
            frame = AssembledFrame(slot.index, self.converter.convert(slot.data), slot.arrival_s, self.epoch)
            if state == PENDING:
                self._pending.append(frame)  # counted complete when published
            else:
                out.append(frame)
                self.counters["frames_complete"] += 1
        else:
            missing = F - slot.received
            self.counters["frames_dropped"] += 1
            self.counters["missing_bytes"] += missing
            self.drop_reasons["incomplete"] += 1
            self.events.append(("dropped", f"frame {slot.index}: {missing} of {F} bytes missing ({reason})"))
        self._pool.append(slot)

