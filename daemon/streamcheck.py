"""Which datagrams belong to the stream: the payload grid, and the evidence that (re)establishes a stream.

Pure and I/O free; used by reassembly.py. A board counts its datagrams (+1 each) and sends its sample
stream in payloads of one size P, so the byte offset of every datagram follows from its counter: d
counts after an anchor datagram at byte offset a, it sits at a + d P (a *continuous* stream), or, for
a board that cuts its datagrams at frame ends (each frame in datagrams of P bytes, the last one
shorter), at the d-th position of that frame-cut grid. A datagram is plausible when its payload is at
most P bytes, its counter is within a bounded step of the stream's and its byte offset is exactly the
one the grid gives for that counter; anything else cannot be a datagram of this stream and is counted
by its reason (SIZE, COUNTER, OFFSET) instead of being used.

A stream is only followed on evidence: RESTART_PACKETS datagrams with distinct counters on one grid.
Datagrams the stream cannot use wait in `Evidence` (bounded: MAX_CANDIDATES grids, MAX_HELD_DATAGRAMS
datagrams, MAX_HELD_AGE arrivals) until a grid collects that many (a new stream: replay them all) or
they are given up (counted by the reason the stream gave them).
"""

from __future__ import annotations

import bisect
from typing import Callable

RESTART_PACKETS = 16
"""Datagrams with distinct counters, all on one payload grid, that it takes to follow a stream: at the
start, and to replace a stream they all disagree with (the board restarted its counters, or the stream
jumped further than MAX_COUNTER_STEP). Why 16: a datagram that is not part of that stream (garbage, a
corrupted or forged header) lands on a given grid only if its counter is within CANDIDATE_SPAN of the
grid's first datagram and its byte offset is exactly the predicted one, for random header fields a
chance of about CANDIDATE_SPAN / 2**(counter bits + offset bits) per datagram; one or two such
coincidences are conceivable, sixteen take a sender that keeps counting, which is what a board is. And
16 is small: at most 16 payloads (usually a fraction of one frame) wait to be replayed, so a stream
that really restarts loses no frame, and one that starts is followed after 16 datagrams."""

MAX_COUNTER_STEP = 1 << 14
"""The largest forward step of packet_sequence (datagrams lost in a row) followed within one stream.
16384 datagrams are more than the adapter's default 8 MiB receive buffer holds for payloads of 512 bytes
or more, so more than one overflow of it loses; a longer gap is followed as a new run once
RESTART_PACKETS datagrams agree. It bounds what one datagram can do: at most this many datagrams
counted lost, at most this many payloads' worth of frames dropped."""

CANDIDATE_SPAN = 2 * RESTART_PACKETS - 1
"""Counters a grid under test may cover after its first datagram (room for losses and reordering among
its RESTART_PACKETS datagrams)."""

MIN_COUNTER_WINDOW = 2 * RESTART_PACKETS
"""Smallest reordering window of the counter (SequenceTracker): wider than CANDIDATE_SPAN, so that the
datagrams that established a stream all fall inside it when they are replayed."""

MAX_COUNTER_WINDOW = 8192
"""Largest reordering window of the counter: bounds the SequenceTracker's memory."""

MAX_CANDIDATES = 8
"""Grids under test at once (each datagram held is tried on each). Random garbage starts a grid per
datagram; the smallest (then oldest) grid stops being tested first (its datagrams stay held, loose), so
a grid that has collected two or more datagrams outlives any run of garbage."""

MAX_HELD_DATAGRAMS = 4 * RESTART_PACKETS
"""Datagrams held at once (each at most 65535 bytes: at most 4 MiB): one stream's evidence plus three
garbage datagrams for each of its datagrams. Beyond it the oldest loose datagrams are given up and
counted."""

MAX_HELD_AGE = 64 * RESTART_PACKETS
"""Arrivals (datagrams of any kind) after which a held datagram is given up and counted, and a grid
whose first datagram is that old stops being tested (checked every EXPIRE_EVERY arrivals). So a new
stream's RESTART_PACKETS datagrams must come within about 1024 arrivals (up to 98 % garbage between
them), a sender with fewer than RESTART_PACKETS datagrams in that many never takes over, and every
datagram is counted at most MAX_HELD_AGE + EXPIRE_EVERY arrivals after it came."""

EXPIRE_EVERY = 64
"""How often (in arrivals) held datagrams are checked for age: rarely enough to cost nothing per datagram."""

SIZE, COUNTER, OFFSET, UNCONFIRMED, LATE = "size", "counter", "offset", "unconfirmed", "late"
IMPLAUSIBLE_REASONS = (SIZE, COUNTER, OFFSET, UNCONFIRMED)
"""Why a datagram was not used: SIZE, a payload longer than the stream's; COUNTER, a counter more than
MAX_COUNTER_STEP ahead of the stream's, or older than its reordering window with a byte offset off the
grid; OFFSET, a plausible counter with a byte offset off the grid; UNCONFIRMED, given up while no
stream was established (no RESTART_PACKETS datagrams agreed). A datagram older than the window but on
the grid is counted `late` (a stale datagram of the stream)."""


def signed_step(a: int, b: int, mod: int) -> int:
    """b - a for counters that wrap at `mod`, in [-mod/2, mod/2)."""
    d = (b - a) % mod
    return d - mod if d >= mod >> 1 else d


UNDECIDED, CONTINUOUS, FRAMECUT = 0, 1, 2
"""Grids: not yet told apart (they differ only across a frame end), continuous, cut at frame ends."""


def continuous_offset(anchor_off: int, d: int, payload: int) -> int:
    """Where a continuous stream puts the datagram `d` counts after the anchor (unwrapped bytes)."""
    return anchor_off + d * payload


def framecut_offset(anchor_off: int, d: int, payload: int, frame_bytes: int) -> int:
    """Where a stream cut at frame ends (frame k's datagrams at k F, k F + payload, ...; the last of each
    frame shorter) puts the datagram `d` counts after the anchor; -1 if the anchor is not on that grid."""
    k, within = divmod(anchor_off, frame_bytes)
    j, rest = divmod(within, payload)
    if rest:
        return -1
    per_frame = -(-frame_bytes // payload)
    q, jj = divmod(k * per_frame + j + d, per_frame)
    return q * frame_bytes + jj * payload


def fits(pred: int, off_raw: int, off_mod: int) -> bool:
    """Whether a raw byte_offset field (modulo off_mod) is the predicted (unwrapped, >= 0) offset."""
    return pred >= 0 and (off_raw - pred) % off_mod == 0


def on_grid(anchor_off: int, d: int, payload: int, frame_bytes: int, off_raw: int, off_mod: int,
            grid: int = UNDECIDED) -> tuple[int, int]:
    """(unwrapped byte offset, grid it fits) of the datagram `d` counts after the anchor (unwrapped byte
    offset `anchor_off`) in a stream of `payload`-byte payloads, if its raw byte_offset `off_raw` is the
    offset `grid` (or, UNDECIDED, either grid) gives; (-1, grid) if it is not. The grid returned is
    decided (CONTINUOUS or FRAMECUT) when this datagram tells the two apart."""
    if frame_bytes % payload == 0:  # the grids coincide
        pred = anchor_off + d * payload
        return (pred, CONTINUOUS) if fits(pred, off_raw, off_mod) else (-1, CONTINUOUS)
    cont = continuous_offset(anchor_off, d, payload) if grid != FRAMECUT else -1
    cut = framecut_offset(anchor_off, d, payload, frame_bytes) if grid != CONTINUOUS else -1
    if fits(cont, off_raw, off_mod):
        return cont, (grid if cut == cont else CONTINUOUS)
    if fits(cut, off_raw, off_mod):
        return cut, FRAMECUT
    return -1, grid


class Held:
    """A datagram the stream could not use: its bytes (a copy), arrival time and order, the reason the
    stream gave (None while no stream is established) and its header values."""

    __slots__ = ("arrival", "data", "t", "reason", "seq", "off", "length")

    def __init__(self, arrival: int, data: bytes, t: float, reason: str | None, seq: int, off: int, length: int):
        self.arrival, self.data, self.t, self.reason = arrival, data, t, reason
        self.seq, self.off, self.length = seq, off, length


class Candidate:
    """A grid under test: anchored at its first datagram (raw counter and byte offset, payload size =
    its payload length), with the datagrams on it (distinct counters 0..CANDIDATE_SPAN after the first)."""

    __slots__ = ("seq", "off", "payload", "steps", "items", "created")

    def __init__(self, item: Held, created: int):
        self.seq, self.off, self.payload = item.seq, item.off, item.length
        self.steps = {0}
        self.items = [item]
        self.created = created

    def admits(self, item: Held, frame_bytes: int, seq_mod: int, off_mod: int) -> int:
        """The item's counter step from the anchor if it lies on this grid (and is new to it), else -1."""
        if item.length > self.payload:
            return -1
        d = signed_step(self.seq, item.seq, seq_mod)
        if not 0 < d <= CANDIDATE_SPAN or d in self.steps:
            return -1
        return d if on_grid(self.off, d, self.payload, frame_bytes, item.off, off_mod)[0] >= 0 else -1


def _arrival(item: Held) -> int:
    return item.arrival


class Evidence:
    """The held datagrams: on the grids they lie on (at most MAX_CANDIDATES grids), or loose (on no grid
    under test: waiting to be judged by the next stream), at most MAX_HELD_DATAGRAMS in all."""

    def __init__(self, frame_bytes: int, seq_bits: int, off_bits: int):
        self.frame_bytes = frame_bytes
        self.seq_mod, self.off_mod = 1 << seq_bits, 1 << off_bits
        self.candidates: list[Candidate] = []
        self.loose: list[Held] = []  # in arrival order
        self.held = 0
        self.held_bytes = 0
        self._created = 0

    def offer(self, item: Held, give_up: Callable[[Held], None]) -> Candidate | None:
        """Hold `item` on the largest grid it fits, or on a new one (a zero-length payload makes no grid:
        it waits loose). Beyond MAX_CANDIDATES grids the smallest (then oldest) one's datagrams go loose;
        beyond MAX_HELD_DATAGRAMS the oldest loose ones are given up (`give_up` called for each).
        Returns the grid if it now holds RESTART_PACKETS datagrams."""
        best, best_d = None, -1
        for c in self.candidates:
            d = c.admits(item, self.frame_bytes, self.seq_mod, self.off_mod)
            if d >= 0 and (best is None or len(c.items) > len(best.items)):
                best, best_d = c, d
        self._count(item, 1)
        if best is not None:
            best.steps.add(best_d)
            best.items.append(item)
        elif item.length == 0:
            bisect.insort(self.loose, item, key=_arrival)
        else:
            best = Candidate(item, self._created)
            self._created += 1
            self.candidates.append(best)
            if len(self.candidates) > MAX_CANDIDATES:
                self._loosen(self._smallest(best))
        while self.held > MAX_HELD_DATAGRAMS:
            if not self.loose:
                self._loosen(self._smallest(best))
            lost = self.loose.pop(0)
            self._count(lost, -1)
            give_up(lost)
        return best if best is not None and len(best.items) >= RESTART_PACKETS else None

    def expire(self, before: int, give_up: Callable[[Held], None]) -> None:
        """Grids whose first datagram arrived before `before` (an arrival number) stop being tested;
        loose datagrams that arrived before it are given up (`give_up` called for each)."""
        for c in [c for c in self.candidates if c.items[0].arrival < before]:
            self._loosen(c)
        while self.loose and self.loose[0].arrival < before:
            lost = self.loose.pop(0)
            self._count(lost, -1)
            give_up(lost)

    def longest(self) -> Candidate | None:
        """The grid with most datagrams (the oldest of equals), or None."""
        return max(self.candidates, key=lambda x: (len(x.items), -x.created), default=None)

    def take_all(self) -> list[Held]:
        """Every held datagram, in arrival order; nothing is held afterwards."""
        items = [it for c in self.candidates for it in c.items] + list(self.loose)
        items.sort(key=lambda it: it.arrival)
        self.candidates.clear()
        self.loose.clear()
        self.held = self.held_bytes = 0
        return items

    def _smallest(self, keep: Candidate | None) -> Candidate:
        """The smallest (then oldest) grid other than `keep`, if there is another."""
        others = [c for c in self.candidates if c is not keep] or self.candidates
        return min(others, key=lambda x: (len(x.items), x.created))

    def _loosen(self, victim: Candidate) -> None:
        """The grid stops being tested; its datagrams wait loose."""
        self.candidates.remove(victim)
        for it in victim.items:
            bisect.insort(self.loose, it, key=_arrival)
        victim.items, victim.steps = [], set()

    def _count(self, item: Held, sign: int) -> None:
        self.held += sign
        self.held_bytes += sign * len(item.data)
