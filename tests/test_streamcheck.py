"""Untrusted datagrams: the plausibility checks of daemon/streamcheck.py inside the Reassembler
(daemon/reassembly.py), driven directly (pure code), plus one run of the adapter over a datagram file.

The reference for every frame is the simulator's raw frame, turned into a board's byte stream by the
test encoder of tests/test_adapter.py (nothing shared with the adapter). The stream facts used are those
of the README ("Stream layout"): packet_sequence goes up by one per datagram, byte_offset is the payload's
position in the continuous stream, frame k is stream bytes [k F, (k+1) F) (common practice for such
capture streams). Garbage is built from the genuine datagram it is sent before, so the reason it must be
counted under follows from its construction and the rules stated in daemon/streamcheck.py:
  truncated below the header         -> malformed "short"
  payload longer than the stream's   -> implausible "size"
  counter >= 2**20 ahead or behind   -> implausible "counter" (MAX_COUNTER_STEP = 2**14 ahead; behind, older
                                        than any counter window, its offset off the grid)
  right counter, offset off the grid -> implausible "offset" (a random 48-bit offset, 2**40, or the genuine
                                        offset + delta, 0 < delta < P)
"""

from __future__ import annotations

import logging
import struct

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from cubecast.daemon.layoutcheck import CONFIRM_FRAMES, DIAGNOSE_DATAGRAMS
from cubecast.daemon.reassembly import Reassembler
from cubecast.daemon.streamcheck import (CANDIDATE_SPAN, MAX_CANDIDATES, MAX_COUNTER_STEP, MAX_COUNTER_WINDOW,
                                         MAX_HELD_AGE, MAX_HELD_DATAGRAMS, RESTART_PACKETS, EXPIRE_EVERY,
                                         FRAMECUT)
from cubecast.daemon.streamlayout import MAX_DATAGRAM_BYTES, parse_layout
from tests.test_adapter import (ADAPTER_LOGGER, LAYOUT_A, LAYOUT_B, LAYOUT_C, adapter_records, encode_frame,
                                header_a, header_b, header_c, packetize, raw_frames, run_file, sensor_12bit,
                                small_sensor, write_file)

FB = 1536  # the small sensor's frame: 6 chirps x 4 RX x 16 samples x 2 components x 2 bytes
AXES = ["chirp", "rx", "sample", "iq"]


def header_am(seq, offset, frame_bytes, payload_len):
    """LAYOUT_A's header with every field reduced to its width (32-bit counter, 48-bit offset, 32-bit
    frame number), for header values beyond the test stream's."""
    offset %= 1 << 48
    return struct.pack(">I", seq & 0xFFFFFFFF) + struct.pack("<h", -2) + offset.to_bytes(6, "little") \
        + struct.pack("<I", (offset // frame_bytes + 100) & 0xFFFFFFFF)


def genuine_stream(n_frames, payload, seq0=0, seed=3):
    sensor = small_sensor()
    frames = raw_frames(sensor, n_frames, seed=seed)
    stream = b"".join(encode_frame(f, AXES, "iq") for f in frames)
    return sensor, frames, packetize(stream, payload, header_a, FB, seq0=seq0)


def feed_all(r, datagrams):
    out = []
    for d in datagrams:
        out += r.feed(d)
    return out + r.flush()


KINDS = ("truncated", "oversized", "ahead", "behind", "random_offset", "misaligned")
EXPECTED_REASON = {"truncated": ("malformed", "short"), "oversized": ("implausible", "size"),
                   "ahead": ("implausible", "counter"), "behind": ("implausible", "counter"),
                   "random_offset": ("implausible", "offset"), "misaligned": ("implausible", "offset")}


def garbage(kind, nxt, rng, payload, special=False):
    """A bad datagram sent just before the genuine datagram `nxt` = (seq, start, end, bytes)."""
    seq, start, end, dg = nxt
    n = end - start
    body = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
    if kind == "truncated":
        return dg[:int(rng.integers(0, 16))]  # LAYOUT_A's header is 16 bytes
    if kind == "oversized":
        if special:  # the largest datagram there is (a 16-bit UDP length: Postel, RFC 768, 1980)
            return header_am(seq, start, FB, 0) + bytes(MAX_DATAGRAM_BYTES - 16)
        return dg + rng.integers(0, 256, int(rng.integers(1, 1300)), dtype=np.uint8).tobytes()
    if kind == "ahead":
        return header_am(seq + int(rng.integers(1 << 20, 1 << 31)), start, FB, n) + body
    if kind == "behind":
        return header_am(seq - int(rng.integers(1 << 20, 1 << 31)), start, FB, n) + body
    if kind == "random_offset":
        off = 1 << 40 if special else int(rng.integers(0, 1 << 48))
        return header_am(seq, off, FB, n) + body
    return header_am(seq, start + int(rng.integers(1, payload)), FB, n) + body  # misaligned


def interleave(packets, rng, n_garbage, payload, lead=3):
    """The genuine datagrams in order with n_garbage bad ones between them (at least `lead` before the
    first genuine one; none after the last). Returns (datagrams, kinds of the bad ones)."""
    slots = np.bincount(rng.integers(0, len(packets), n_garbage - lead), minlength=len(packets))
    slots[0] += lead
    kinds = [KINDS[i % len(KINDS)] for i in range(n_garbage)]
    rng.shuffle(kinds)
    first = {k: kinds.index(k) for k in ("oversized", "random_offset")}  # one maximal datagram, one 2**40
    out, used, it = [], [], iter(range(n_garbage))
    for p, count in zip(packets, slots):
        for _ in range(count):
            i = next(it)
            out.append(garbage(kinds[i], p, rng, payload, special=first.get(kinds[i]) == i))
            used.append(kinds[i])
        out.append(p[3])
    return out, used


def expected_tallies(kinds):
    malformed, implausible = {}, {}
    for k in kinds:
        total, reason = EXPECTED_REASON[k]
        d = malformed if total == "malformed" else implausible
        d[reason] = d.get(reason, 0) + 1
    return malformed, implausible


def check_partition(s):
    """Every datagram counted once (the Reassembler's docstring)."""
    assert s["packets"] == (s["malformed"] + s["implausible"] + s["duplicates"] + s["late"] + s["used"]
                            + s["held"]), s
    assert sum(s["malformed_reasons"].values()) == s["malformed"]
    assert sum(s["implausible_reasons"].values()) == s["implausible"]
    assert sum(s["drop_reasons"].values()) == s["frames_dropped"]


# ---- the regression: half the datagrams are garbage ------------------------------------------------

def test_half_garbage_publishes_every_frame_byte_equal_with_exact_counts():
    """40 frames in 200-byte payloads (308 datagrams; 200 does not divide 1536, so payloads span frames)
    and as many bad datagrams (50 %), interleaved at random: every frame comes out, byte for byte the
    frame built without the garbage, and every bad datagram is counted once under its reason."""
    sensor, frames, packets = genuine_stream(40, 200)
    rng = np.random.default_rng(2024)
    datagrams, kinds = interleave(packets, rng, len(packets), 200)
    assert len(datagrams) == 2 * len(packets) == 616 and set(kinds) == set(KINDS)

    clean = feed_all(Reassembler(parse_layout(LAYOUT_A), sensor), [p[3] for p in packets])
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = [f for d in datagrams for f in r.feed(d)]
    assert r.stats()["stream_payload_bytes"] == 200  # the payload size the grid was learnt with
    got += r.flush()
    s = r.stats()

    assert [f.index for f in got] == [f.index for f in clean] == list(range(40))
    for f, c in zip(got, clean):
        assert f.data.tobytes() == c.data.tobytes() and np.array_equal(f.data, frames[f.index])
        assert f.epoch == 0
    malformed, implausible = expected_tallies(kinds)
    assert s["malformed_reasons"] == malformed and s["implausible_reasons"] == implausible
    assert s["packets"] == 616 and s["used"] == len(packets) == 308
    assert (s["lost"], s["duplicates"], s["reordered"], s["late"]) == (0, 0, 0, 0)
    assert (s["frames_complete"], s["frames_dropped"], s["missing_bytes"], s["restarts"]) == (40, 0, 0, 0)
    assert s["frame_number_mismatches"] == 0 and s["held"] == 0
    check_partition(s)
    # the counts, for the record (seed 2024): 308 bad datagrams in six kinds
    print("garbage by kind:", {k: kinds.count(k) for k in KINDS}, "counted:", malformed, implausible)


def test_one_spoofed_offset_of_2_to_the_40_changes_nothing_but_its_count():
    sensor, frames, packets = genuine_stream(12, 200)
    spoof = header_a(packets[50][0], 1 << 40, FB, 200) + bytes(200)  # the next counter, offset 2**40
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = feed_all(r, [p[3] for p in packets[:50]] + [spoof] + [p[3] for p in packets[50:]])
    s = r.stats()
    assert [f.index for f in got] == list(range(12))
    assert all(np.array_equal(f.data, frames[f.index]) for f in got)
    assert s["implausible_reasons"] == {"offset": 1} and s["restarts"] == 0
    assert (s["lost"], s["frames_dropped"], s["late"]) == (0, 0, 0)


def test_impaired_stream_with_garbage_counts_like_without():
    """Losses, duplicates and swaps (the impairments of tests/test_adapter.py) plus 50 % garbage: the
    stream's own counters come out as they do without the garbage."""
    from tests.test_adapter import expected_counts, impair
    sensor, frames, packets = genuine_stream(30, 200)
    sent, withheld = impair(packets, np.random.default_rng(7), n_lost=6, n_dup=8, n_swap=10)
    counts, dropped = expected_counts(sent, withheld, FB)
    rng = np.random.default_rng(8)
    datagrams, kinds = interleave(sent, rng, len(sent), 200)
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = feed_all(r, datagrams)
    s = r.stats()
    for k, v in counts.items():
        assert s[k] == v, k
    assert s["frames_dropped"] == len(dropped) and s["drop_reasons"] == {"incomplete": len(dropped)}
    assert [f.index for f in got] == sorted(set(range(30)) - dropped)
    assert all(np.array_equal(f.data, frames[f.index]) for f in got)
    malformed, implausible = expected_tallies(kinds)
    assert s["malformed_reasons"] == malformed and s["implausible_reasons"] == implausible
    assert s["restarts"] == 0 and s["late"] == 0
    check_partition(s)


# ---- restarts: only on sustained evidence ------------------------------------------------------------

def test_a_genuine_restart_amid_garbage_is_followed_as_a_new_run():
    """The board restarts (counter and byte offset start again at 0) while half the datagrams are
    garbage: both runs are published whole, the second with a new epoch, one restart counted."""
    sensor = small_sensor()
    frames = raw_frames(sensor, 16)
    enc = [encode_frame(f, AXES, "iq") for f in frames]
    first = packetize(b"".join(enc[:10]), 300, header_a, FB, seq0=5000)
    second = packetize(b"".join(enc[10:]), 300, header_a, FB)
    rng = np.random.default_rng(31)
    datagrams, kinds = interleave(first + second, rng, len(first) + len(second), 300)
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = feed_all(r, datagrams)
    s = r.stats()
    assert [(f.epoch, f.index) for f in got] == [(0, k) for k in range(10)] + [(1, k) for k in range(6)]
    for f, ref in zip(got, frames):
        assert np.array_equal(f.data, ref)
    assert s["restarts"] == 1 and (s["lost"], s["frames_dropped"], s["late"]) == (0, 0, 0)
    malformed, implausible = expected_tallies(kinds)
    assert s["malformed_reasons"] == malformed and s["implausible_reasons"] == implausible
    check_partition(s)


def test_a_board_that_restarts_as_it_began_is_followed():
    """Counter 0, byte offset 0 again, the same payloads: the new run lies on the old run's grid, only
    older than its counter window (52 datagrams back, window 32): held as late, then followed."""
    sensor = small_sensor()
    frames = raw_frames(sensor, 14)
    enc = [encode_frame(f, AXES, "iq") for f in frames]
    first = packetize(b"".join(enc[:10]), 300, header_a, FB)
    second = packetize(b"".join(enc[10:]), 300, header_a, FB)
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = feed_all(r, [p[3] for p in first + second])
    s = r.stats()
    assert [(f.epoch, f.index) for f in got] == [(0, k) for k in range(10)] + [(1, k) for k in range(4)]
    assert all(np.array_equal(f.data, ref) for f, ref in zip(got, frames))
    assert s["restarts"] == 1 and (s["late"], s["lost"], s["implausible"], s["frames_dropped"]) == (0, 0, 0, 0)


def test_rare_garbage_is_counted_within_the_age_bound_and_a_thin_foreign_stream_never_takes_over():
    """One bad datagram in a long clean stream is counted at most MAX_HELD_AGE + EXPIRE_EVERY arrivals
    later, not at the end; a foreign sender's consistent datagrams, one in every 100 arrivals (fewer than
    RESTART_PACKETS in MAX_HELD_AGE), never make a restart."""
    sensor, frames, packets = genuine_stream(300, 256)  # 1800 datagrams
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    spoof_at = 100
    limit = spoof_at + 1 + MAX_HELD_AGE + EXPIRE_EVERY
    for i, p in enumerate(packets[:limit]):
        if i == spoof_at:
            r.feed(header_a(p[0], p[1] + 3, FB, 256) + bytes(256))  # misaligned by 3 bytes
        r.feed(p[3])
    s = r.stats()
    assert s["held"] == 0 and s["implausible_reasons"] == {"offset": 1}

    foreign = [header_a(700_000 + j, 10 * FB + 256 * j, FB, 256) + bytes(256) for j in range(18)]
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    out = []
    for i, p in enumerate(packets):
        if i % 100 == 50:
            out += r.feed(foreign[i // 100])
        out += r.feed(p[3])
    out += r.flush()
    s = r.stats()
    assert s["restarts"] == 0 and s["implausible_reasons"] == {"counter": 18}
    assert [f.index for f in out] == list(range(300))


@pytest.mark.parametrize("n_foreign", [RESTART_PACKETS - 1, RESTART_PACKETS])
def test_a_foreign_stream_takes_over_only_with_restart_packets_datagrams(n_foreign):
    """A second sender's consistent stream (its own counters and offsets) interleaved with the board's:
    RESTART_PACKETS - 1 of its datagrams are held and then counted; the RESTART_PACKETS-th makes it the
    stream (a restart)."""
    sensor, frames, packets = genuine_stream(12, 256)
    foreign = packetize(bytes(256 * n_foreign), 256, header_a, FB, seq0=900_000_000)
    foreign = [(s, a + 10 * FB, b, header_a(s, a + 10 * FB, FB, 256) + bytes(256)) for s, a, b, _ in foreign]
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    out = [f for p in packets[:30] for f in r.feed(p[3])]
    for i, f in enumerate(foreign):
        out += r.feed(f[3])
        out += r.feed(packets[30 + i][3])
    s = r.stats()
    if n_foreign < RESTART_PACKETS:
        assert s["restarts"] == 0 and s["held"] == n_foreign
        out += [f for p in packets[30 + n_foreign:] for f in r.feed(p[3])] + r.flush()
        s = r.stats()
        assert [f.index for f in out] == list(range(12)) and s["held"] == 0
        assert s["implausible_reasons"] == {"counter": n_foreign} and s["frames_dropped"] == 0
    else:
        assert s["restarts"] == 1 and r.epoch == 1 and r.stats()["held"] < RESTART_PACKETS


def test_a_gap_beyond_max_counter_step_is_a_new_run_and_one_within_it_is_not():
    """Consistent counters and offsets after a gap: up to MAX_COUNTER_STEP datagrams lost in a row are
    counted lost in the same run; one more and the stream is re-established as a new run."""
    sensor, frames, packets = genuine_stream(6, 256)  # 6 datagrams per frame
    tail = packetize(b"".join(encode_frame(f, AXES, "iq") for f in raw_frames(sensor, 6, seed=4)), 256,
                     header_a, FB)
    within = (MAX_COUNTER_STEP - 1) // 6 * 6  # whole frames lost, the counter steps by within + 1
    beyond = -(-MAX_COUNTER_STEP // 6) * 6  # the counter steps by more than MAX_COUNTER_STEP
    for gap, restarts in ((within, 0), (beyond, 1)):
        shift = len(packets) + gap
        moved = [header_a(s + shift, a + shift * 256, FB, b - a) + dg[16:] for s, a, b, dg in tail]
        r = Reassembler(parse_layout(LAYOUT_A), sensor)
        got = feed_all(r, [p[3] for p in packets] + moved)
        s = r.stats()
        assert s["restarts"] == restarts
        assert [f.epoch for f in got] == [0] * 6 + [restarts] * 6
        assert all(np.array_equal(f.data.tobytes(), g.data.tobytes()) for f, g in zip(got[6:], feed_all(
            Reassembler(parse_layout(LAYOUT_A), sensor), [p[3] for p in tail])))
        if restarts == 0:
            assert s["lost"] == gap and s["frames_dropped"] == gap * 256 // FB
            assert s["drop_reasons"] == {"unseen": gap * 256 // FB}
        else:
            assert s["lost"] == 0 and s["frames_dropped"] == 0 and s["implausible"] == 0


# ---- grids ----------------------------------------------------------------------------------------

def framecut_packets(stream, payload):
    """A board that cuts its datagrams at frame ends: each frame in `payload`-byte datagrams, the last
    one shorter; the counter goes on across frames."""
    out, seq = [], 0
    for k in range(len(stream) // FB):
        for a in range(k * FB, (k + 1) * FB, payload):
            b = min(a + payload, (k + 1) * FB)
            out.append((seq, a, b, header_a(seq, a, FB, b - a) + stream[a:b]))
            seq += 1
    return out


def test_a_board_that_cuts_at_frame_ends_is_followed_through_losses_and_swaps():
    sensor = small_sensor()
    frames = raw_frames(sensor, 20)
    stream = b"".join(encode_frame(f, AXES, "iq") for f in frames)
    packets = framecut_packets(stream, 400)  # 400, 400, 400, 336 per frame
    assert [b - a for _, a, b, _ in packets[:4]] == [400, 400, 400, 336]
    # the short last datagram of frames 5, 9 lost: the first datagram of frames 6, 10 follows a gap that
    # crosses a frame end; the short one of frame 13 swapped with the next frame's first
    lost = {4 * 5 + 3, 4 * 9 + 3}
    order = [p for i, p in enumerate(packets) if i not in lost]
    j = order.index(packets[4 * 13 + 3])
    order[j], order[j + 1] = order[j + 1], order[j]
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = [f for p in order for f in r.feed(p[3])]
    assert r.grid == FRAMECUT  # told apart at the first frame end
    got += r.flush()
    s = r.stats()
    assert [f.index for f in got] == [k for k in range(20) if k not in (5, 9)]
    assert all(np.array_equal(f.data, frames[f.index]) for f in got)
    assert s["implausible"] == 0 and s["lost"] == 2 and s["reordered"] == 1 and s["restarts"] == 0


def test_once_a_stream_is_known_continuous_the_frame_cut_position_is_off_the_grid():
    """At a frame end the two grids differ; a datagram at the frame-cut position (the frame's start)
    with the next counter is implausible once the stream has shown it is continuous."""
    sensor, frames, packets = genuine_stream(6, 400)  # 1536 = 3 x 400 + 336: datagram 3 spans frames 0, 1
    # datagram 7 sits at 2800, spanning the end of frame 1 (3072); the frame-cut grid puts counter 8 at 3072
    spoof = header_a(8, 2 * FB, FB, 400) + bytes(400)
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = feed_all(r, [p[3] for p in packets[:8]] + [spoof] + [p[3] for p in packets[8:]])
    assert [f.index for f in got] == list(range(6))
    assert all(np.array_equal(f.data, frames[f.index]) for f in got)
    assert r.stats()["implausible_reasons"] == {"offset": 1}


def test_a_layout_whose_offsets_are_not_in_bytes_establishes_nothing_and_says_why():
    """The board counts its offsets in 4-byte words but the layout says bytes: no two datagrams agree,
    nothing is published, every datagram is counted unconfirmed, and the event names the fields."""
    sensor, frames, packets = genuine_stream(4, 256)
    words = [header_a(s, a // 4, FB, b - a) + dg[16:] for s, a, b, dg in packets]
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    assert feed_all(r, words) == []
    s = r.stats()
    assert s["implausible_reasons"] == {"unconfirmed": len(words)} and s["used"] == 0
    texts = [t for kind, t in r.events if kind == "unconfirmed"]
    assert texts and "packet_sequence and byte_offset" in texts[-1]


# ---- the adapter over a file: the same counts, reported ------------------------------------------------

def test_adapter_reports_the_reasons(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger=ADAPTER_LOGGER)
    sensor, frames, packets = genuine_stream(10, 200)
    datagrams, kinds = interleave(packets, np.random.default_rng(5), len(packets) // 2, 200)
    write_file(tmp_path / "g.dgram", datagrams)
    stats, msgs = run_file(parse_layout(LAYOUT_A), sensor, tmp_path / "g.dgram")
    malformed, implausible = expected_tallies(kinds)
    assert stats["implausible_reasons"] == implausible and stats["malformed_reasons"] == malformed
    assert [m.seq for m in msgs] == list(range(10)) and len({m.run for m in msgs}) == 1
    assert all(np.array_equal(m.data, frames[m.seq]) for m in msgs)
    lines = [r.getMessage() for r in adapter_records(caplog)]
    summary = lines[-1]
    assert summary.startswith("cubecast adapter: published 10 frames; packets ")
    assert f"implausible {sum(implausible.values())} (" in summary and "counter " in summary
    warnings = [r.getMessage() for r in adapter_records(caplog, logging.WARNING)]
    assert any("implausible: datagram counter" in w for w in warnings), warnings


# ---- fuzz: the parser and reassembler on arbitrary datagrams ------------------------------------------

LAYOUTS = {
    "A": (LAYOUT_A, header_am, small_sensor, FB, ["chirp", "rx", "sample", "iq"], "iq", "int16", "little", b""),
    "B": (LAYOUT_B, header_b, small_sensor, FB, ["chirp", "sample", "rx", "iq"], "qi", "int16", "big", b"\xee" * 3),
    "C": (LAYOUT_C % ("iq", ["chirp", "rx", "sample", "iq"]), header_c, sensor_12bit, 1152,
          ["chirp", "rx", "sample", "iq"], "iq", "packed12", "little", b""),
}
_BASE: dict = {}


def base_packets(name, payload):
    key = (name, payload)
    if key not in _BASE:
        text, header, make, fb, axes, iq, stype, order, pad = LAYOUTS[name]
        sensor = make()
        stream = b"".join(encode_frame(f, axes, iq, stype, order) for f in raw_frames(sensor, 5))
        _BASE[key] = (parse_layout(text), sensor, fb, header, packetize(stream, payload, header, fb, pad))
    return _BASE[key]


op = st.one_of(
    st.tuples(st.just("keep"), st.integers(0, 10_000)),
    st.tuples(st.just("seq"), st.integers(0, 10_000), st.integers(0, 2**64 - 1)),
    st.tuples(st.just("off"), st.integers(0, 10_000),
              st.sampled_from([0, 1, 2**16, 2**40, 2**47, 2**63]) | st.integers(0, 2**64 - 1)),
    st.tuples(st.just("shift"), st.integers(0, 10_000), st.integers(-3, 3), st.integers(-700, 700)),
    st.tuples(st.just("cut"), st.integers(0, 10_000), st.integers(0, 600)),
    st.tuples(st.just("grow"), st.integers(0, 10_000), st.binary(min_size=1, max_size=900)),
    st.tuples(st.just("bytes"), st.binary(max_size=700)),
    st.tuples(st.just("block"), st.integers(0, 10_000), st.integers(1, 40), st.integers(0, 2**32),
              st.integers(0, 2**20)),  # consecutive datagrams, counters and offsets shifted: a new stream
)


def build(ops, packets, header, fb):
    """The datagrams the fuzz operations describe, from the genuine `packets` (index modulo their count)."""
    out = []
    hl = len(header(0, 0, fb, 0))
    for o in ops:
        if o[0] == "bytes":
            out.append(o[1])
            continue
        if o[0] == "block":
            for j in range(o[2]):
                seq, a, b, dg = packets[(o[1] + j) % len(packets)]
                out.append(header(seq + o[3], a + o[4], fb, b - a) + dg[hl:])
            continue
        seq, a, b, dg = packets[o[1] % len(packets)]
        if o[0] == "keep":
            out.append(dg)
        elif o[0] == "seq":
            out.append(header(o[2], a, fb, b - a) + dg[hl:])
        elif o[0] == "off":
            out.append(header(seq, o[2], fb, b - a) + dg[hl:])
        elif o[0] == "shift":
            out.append(header(seq + o[2], max(0, a + o[3]), fb, b - a) + dg[hl:])
        elif o[0] == "cut":
            out.append(dg[:o[2]])
        else:
            out.append(dg + o[2])
    return out


MONOTONE = ("packets", "malformed", "implausible", "duplicates", "reordered", "lost", "late", "used",
            "frames_complete", "frames_dropped", "missing_bytes", "restarts", "payload_bytes")


def check_invariants(r, s, before, window):
    """The invariants the fuzz test checks after every datagram (stated in its docstring)."""
    check_partition(s)
    for k in MONOTONE:
        assert s[k] >= before.get(k, 0), k
    # frames dropped for want of bytes miss at least one byte each; those of a frame size the stream
    # contradicts (layoutcheck.py) are whole
    short = s["frames_dropped"] - s["drop_reasons"].get("frame_size", 0)
    assert short <= s["missing_bytes"] <= short * r.frame_bytes
    accepted = s["used"] + s["late"] + s["duplicates"]
    assert s["lost"] <= accepted * MAX_COUNTER_STEP
    reach = (MAX_COUNTER_STEP + 1) * MAX_DATAGRAM_BYTES // r.frame_bytes + window + 1
    assert s["frames_complete"] + s["frames_dropped"] <= accepted * reach
    # memory: the bounds of the reassembly state
    assert s["frames_in_flight"] == len(r.slots) <= window and len(r.slots) + len(r._pool) == window
    assert s["held"] <= MAX_HELD_DATAGRAMS and s["held_bytes"] <= MAX_HELD_DATAGRAMS * MAX_DATAGRAM_BYTES
    assert len(r.evidence.candidates) <= MAX_CANDIDATES
    assert len(r.evidence.loose) + sum(len(c.items) for c in r.evidence.candidates) == s["held"]
    held = r.evidence.loose + [it for c in r.evidence.candidates for it in c.items]
    assert all(it.arrival > r._arrivals - MAX_HELD_AGE - EXPIRE_EVERY for it in held)  # the age bound
    assert all(len(c.items) < RESTART_PACKETS and len(c.steps) == len(c.items) <= CANDIDATE_SPAN + 1
               for c in r.evidence.candidates)
    assert not r._replay and len(r.events) <= 256
    # frames waiting for the frame size's confirmation: the first CONFIRM_FRAMES frames and what one datagram
    # starting there can complete
    assert len(r._pending) <= CONFIRM_FRAMES + MAX_DATAGRAM_BYTES // r.frame_bytes + 2
    assert r._first is None or len(r._first) <= DIAGNOSE_DATAGRAMS
    if r.seqs is not None:
        assert r.seqs.window <= MAX_COUNTER_WINDOW and max(r.seqs.sizes()) <= r.seqs.window


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(name=st.sampled_from(sorted(LAYOUTS)), payload=st.sampled_from([96, 200, 300, 512]),
       window=st.integers(1, 4), prefix=st.integers(0, 40), ops=st.lists(op, max_size=90),
       loops=st.sampled_from([2, 2, 1, 4]))
def test_fuzz_the_parser_and_reassembler(name, payload, window, prefix, ops, loops):
    """Arbitrary datagrams after a genuine prefix (0..40 datagrams): edited headers (counters, offsets),
    cut and grown datagrams, random bytes. Checked after every datagram: no exception at all; every
    datagram counted once (packets = malformed + implausible + duplicates + late + used + held) and each
    reason tally adds up to its total; no counter ever decreases; lost at most MAX_COUNTER_STEP per
    datagram used, frames finished at most what one datagram can reach per datagram used; and the state
    within its bounds (frames in flight <= window, held <= MAX_HELD_DATAGRAMS, grids <= MAX_CANDIDATES,
    the counter window's sets <= its size <= MAX_COUNTER_WINDOW; frames waiting for the frame size's
    confirmation bounded). After flush nothing is held or in flight. Half the examples read the stream with
    the board's frame size (2 loops), the others with half or twice it."""
    layout, sensor, fb, header, packets = base_packets(name, payload)
    if loops != 2:
        sensor = LAYOUTS[name][2](loops=loops)
    datagrams = [p[3] for p in packets[:prefix]] + build(ops, packets, header, fb)
    r = Reassembler(layout, sensor, window_frames=window)
    before: dict = {}
    for d in datagrams:
        for f in r.feed(d):
            assert f.data.shape == sensor.adc.raw_shape(sensor.chirps_per_frame, sensor.n_rx,
                                                        sensor.samples_per_chirp)
        s = r.stats()
        check_invariants(r, s, before, window)
        before = s
    r.flush()
    s = r.stats()
    check_invariants(r, s, before, window)
    assert s["held"] == 0 and s["frames_in_flight"] == 0 and s["packets"] == len(datagrams)
    for what in ("frames_complete", "frames_dropped", "restarts", "implausible", "malformed", "late", "lost"):
        event(f"{what} > 0" if s[what] else f"{what} = 0")  # the reach of the examples (--hypothesis-show-statistics)
    event(f"reasons {sorted(s['implausible_reasons'])}")


# ---- live over UDP on 127.0.0.1 -------------------------------------------------------------------------

def test_udp_live_with_half_garbage(tmp_path):
    """The same over a real socket (127.0.0.1, a port the OS picks, every wait bounded). Loopback may
    itself drop datagrams on a busy machine: the exact checks then are that every published frame is
    its simulated frame and that the datagrams the adapter saved, replayed from the file, give the same
    counters; with nothing dropped, also every frame and the expected tallies."""
    from tests.test_adapter import run_udp_live
    sensor, frames, packets = genuine_stream(20, 400)
    datagrams, kinds = interleave(packets, np.random.default_rng(77), len(packets), 400)
    # an IPv4 UDP payload is at most 65507 bytes (65535 - 20 IP - 8 UDP header bytes: Postel, RFC 768, 1980)
    datagrams = [d[:65507] for d in datagrams]
    saved = tmp_path / "live.dgram"
    s, msgs = run_udp_live(parse_layout(LAYOUT_A), sensor, datagrams, saved)
    assert all(np.array_equal(m.data, frames[m.seq]) for m in msgs) and s["restarts"] == 0
    check_partition(s)
    if s["packets"] == len(datagrams):
        malformed, implausible = expected_tallies(kinds)
        assert s["malformed_reasons"] == malformed and s["implausible_reasons"] == implausible
        assert [m.seq for m in msgs] == list(range(20)) and s["lost"] == 0 and s["frames_dropped"] == 0
    else:
        print(f"loopback dropped {len(datagrams) - s['packets']} of {len(datagrams)} datagrams")
    stats_f, msgs_f = run_file(parse_layout(LAYOUT_A), sensor, saved)
    for k in ("packets", "malformed", "implausible", "used", "lost", "late", "frames_complete", "frames_dropped"):
        assert stats_f[k] == s[k], k
    assert stats_f["implausible_reasons"] == s["implausible_reasons"]
    assert [m.data.tobytes() for m in msgs_f] == [m.data.tobytes() for m in msgs]
