"""The hardware adapter: board datagram streams (UDP on 127.0.0.1, or datagram files) in, ADC frames out
(daemon/streamlayout.py, reassembly.py, adapter.py).

The reference for every frame is the simulator's raw frame (Simulator.raw_frame, the sensor's ADC
format). The tests turn it into a board's byte stream with their own encoder (a gather by stream
position and, for 12-bit samples, a per-sample Python packer: nothing shared with the adapter's
reshape/transpose/unpack), cut the stream into datagrams with headers packed by struct, and impair the
sequence deterministically (seeded rng): some datagrams withheld, some sent twice, some swapped. The
expected counters follow from the send order by the definitions in the README ("Stream layout").
Every wait is bounded; UDP uses 127.0.0.1 and a port the OS picks.
"""

from __future__ import annotations

import argparse
import logging
import signal
import socket
import struct
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from cubecast.daemon.adapter import StreamAdapter, add_parser, iter_datagram_file, parse_udp_endpoint
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.reassembly import Reassembler
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sensor import load_sensor, parse_sensor
from cubecast.daemon.intake import AdcValidator
from cubecast.daemon.simulate import Simulator
from cubecast.daemon.streamlayout import load_layout, parse_layout
from tests.helpers import SAMPLES, YARD_SENSOR, sensor_text
from tests.test_service import REPO, Collector, wait_until

SCENE = parse_scene("""
[scene]
name = "bench"
[[target]]
name = "corner reflector"
position_m = [0.5, 4.0, 0.0]
rcs_dbsm = 10.0
[[target]]
name = "walker"
position_m = [-1.0, 7.0, 0.0]
velocity_mps = [0.0, 1.2, 0.0]
rcs_dbsm = 0.0
""", "test scene")

# A small sensor: 2 loops x 3 TX = 6 chirps, 4 RX, 16 samples: 384 complex samples, 1536 int16 bytes.
SMALL = dict(loops=2, samples=16)


def small_sensor(**kw):
    return parse_sensor(sensor_text(**{**SMALL, **kw}), "test")


def sensor_12bit(**kw):
    # full scale 2047: the quantised samples fit 12-bit two's complement (-2048..2047, common practice)
    return parse_sensor(sensor_text(**{**SMALL, **kw}).replace("full_scale = 8191", "full_scale = 2047"), "test")


def raw_frames(sensor, n, seed=3):
    sim = Simulator(sensor, SCENE, seed=seed)
    return [sim.raw_frame(i) for i in range(n)]


# ---- the test's own stream encoder ------------------------------------------------------------

def stream_values(raw: np.ndarray, axis_order, iq_order) -> np.ndarray:
    """The frame's sample values in stream order: for each stream position, its index along every
    stream axis (mixed radix, slowest first) picks the sample from the [chirp, rx, sample(, iq)] frame."""
    dims = {"chirp": raw.shape[0], "rx": raw.shape[1], "sample": raw.shape[2], "iq": 2}
    shape = [dims[a] for a in axis_order]
    idx = dict(zip(axis_order, np.unravel_index(np.arange(int(np.prod(shape))), shape)))
    if iq_order == "real":
        return raw[idx["chirp"], idx["rx"], idx["sample"]]
    comp = idx["iq"] if iq_order == "iq" else 1 - idx["iq"]
    return raw[idx["chirp"], idx["rx"], idx["sample"], comp]


def pack12(values) -> bytes:
    """Two 12-bit two's complement samples per 3 bytes: first in bits 0..11, second in bits 12..23 of
    the little-endian 24-bit word (the README's packing), written sample by sample."""
    out = bytearray()
    vals = [int(v) for v in values]
    for a, b in zip(vals[0::2], vals[1::2]):
        assert -2048 <= a <= 2047 and -2048 <= b <= 2047
        word = (a & 0xFFF) | ((b & 0xFFF) << 12)
        out += bytes([word & 0xFF, (word >> 8) & 0xFF, (word >> 16) & 0xFF])
    return bytes(out)


def encode_frame(raw, axis_order, iq_order, sample_type="int16", byte_order="little") -> bytes:
    values = stream_values(raw, axis_order, iq_order)
    if sample_type == "packed12":
        return pack12(values)
    return np.asarray(values).astype("<i2" if byte_order == "little" else ">i2").tobytes()


# ---- layouts and their header packers ----------------------------------------------------------

LAYOUT_A = """
[layout]
description = "test board A: 16-byte header, 48-bit offset, rest of datagram"
[packet]
header_size_bytes = 16
[[packet.field]]
name = "seq"
offset_bytes = 0
size_bytes = 4
type = "uint"
byte_order = "big"
meaning = "packet_sequence"
[[packet.field]]
name = "flags"
offset_bytes = 4
size_bytes = 2
type = "int"
byte_order = "little"
meaning = "ignore"
[[packet.field]]
name = "offset"
offset_bytes = 6
size_bytes = 6
type = "uint"
byte_order = "little"
meaning = "byte_offset"
[[packet.field]]
name = "frame"
offset_bytes = 12
size_bytes = 4
type = "uint"
byte_order = "little"
meaning = "frame_number"
[samples]
type = "int16"
byte_order = "little"
iq_order = "iq"
axis_order = ["chirp", "rx", "sample", "iq"]
"""


def header_a(seq, offset, frame_bytes, payload_len):
    return struct.pack(">I", seq & 0xFFFFFFFF) + struct.pack("<h", -2) + offset.to_bytes(6, "little") \
        + struct.pack("<I", offset // frame_bytes + 100)  # frame numbers counted from 100


LAYOUT_B = """
[packet]
header_size_bytes = 12
[[packet.field]]
name = "n"
offset_bytes = 0
size_bytes = 1
type = "uint"
byte_order = "little"
meaning = "packet_sequence"
[[packet.field]]
name = "len"
offset_bytes = 2
size_bytes = 2
type = "uint"
byte_order = "big"
meaning = "payload_size"
[[packet.field]]
name = "pos"
offset_bytes = 4
size_bytes = 8
type = "uint"
byte_order = "big"
meaning = "byte_offset"
[samples]
type = "int16"
byte_order = "big"
iq_order = "qi"
axis_order = ["chirp", "sample", "rx", "iq"]
"""
PADDING_B = b"\xee" * 5  # trailing bytes after the sized payload


def header_b(seq, offset, frame_bytes, payload_len):
    return struct.pack("<BB", seq & 0xFF, 0x5A) + struct.pack(">H", payload_len) + struct.pack(">Q", offset)


LAYOUT_C = """
[packet]
header_size_bytes = 4
[[packet.field]]
name = "seq"
offset_bytes = 0
size_bytes = 2
type = "int"
byte_order = "little"
meaning = "packet_sequence"
[[packet.field]]
name = "off16"
offset_bytes = 2
size_bytes = 2
type = "uint"
byte_order = "little"
meaning = "byte_offset"
[samples]
type = "packed12"
iq_order = "%s"
axis_order = %s
"""


def header_c(seq, offset, frame_bytes, payload_len):
    return struct.pack("<HH", seq & 0xFFFF, offset & 0xFFFF)  # both counters wrap at 16 bits


def packetize(stream: bytes, payload_bytes: int, header, frame_bytes: int, padding: bytes = b"", seq0: int = 0):
    """[(seq, first byte, last byte + 1, datagram)] covering the stream in order."""
    out = []
    for i, start in enumerate(range(0, len(stream), payload_bytes)):
        chunk = stream[start:start + payload_bytes]
        out.append((seq0 + i, start, start + len(chunk), header(seq0 + i, start, frame_bytes, len(chunk)) + chunk
                    + padding))
    return out


def impair(packets, rng, n_lost, n_dup, n_swap):
    """Deterministic impairments: withhold n_lost datagrams (never the first or the last: a receiver
    cannot know of losses before the first datagram or after the last), swap n_swap adjacent pairs,
    send n_dup datagrams a second time 1..3 positions later. Returns (send order, withheld)."""
    n = len(packets)
    lost = set(int(i) for i in rng.choice(np.arange(1, n - 1), n_lost, replace=False))
    kept = [p for i, p in enumerate(packets) if i not in lost]
    swaps = sorted(int(i) for i in rng.choice(np.arange(0, len(kept) - 1, 3), n_swap, replace=False))
    for i in swaps:
        kept[i], kept[i + 1] = kept[i + 1], kept[i]
    dups = sorted((int(i) for i in rng.choice(len(kept), n_dup, replace=False)), reverse=True)
    for i in dups:
        kept.insert(min(len(kept), i + 1 + int(rng.integers(1, 4))), kept[i])
    return kept, [packets[i] for i in sorted(lost)]


def expected_counts(sent, withheld, frame_bytes):
    """Counters by their definitions, from the send order: a duplicate repeats a counter already sent; a
    reordered datagram is the first of its counter but below the highest sent before it; a frame is
    dropped when a withheld datagram carried any of its bytes."""
    seen, hi, dups, reordered = set(), -1, 0, 0
    for seq, *_ in sent:
        if seq in seen:
            dups += 1
            continue
        if seq < hi:
            reordered += 1
        seen.add(seq)
        hi = max(hi, seq)
    dropped = set()
    for _, a, b, _ in withheld:
        dropped.update(range(a // frame_bytes, (b - 1) // frame_bytes + 1))
    return {"lost": len(withheld), "duplicates": dups, "reordered": reordered}, dropped


ADAPTER_LOGGER = "cubecast.daemon.adapter"


@pytest.fixture
def adapter_log(caplog):
    """The adapter's log records at INFO and above."""
    caplog.set_level(logging.INFO, logger=ADAPTER_LOGGER)
    return caplog


def adapter_records(caplog, level=None):
    return [r for r in caplog.records if r.name == ADAPTER_LOGGER and (level is None or r.levelno == level)]


def write_file(path, datagrams):
    with open(path, "wb") as f:
        for d in datagrams:
            f.write(struct.pack("<I", len(d)) + d)


def run_file(layout, sensor, path, **kw):
    """Run the adapter over a datagram file at full speed; collect what a SUB on its PUB receives."""
    a = StreamAdapter(layout, sensor, "tcp://127.0.0.1:*", file=path, speed=None, wait_s=10, **kw)
    col = Collector(a.bind())
    try:
        stats = a.run()
        assert col.wait_for(lambda c: len(c.of("adc")) >= stats["frames_published"], 10)
        time.sleep(0.05)
        msgs = col.of("adc")
        assert not col.invalid
    finally:
        col.close()
    return stats, msgs


def check_published(msgs, frames, sensor, expect_indices):
    """Every published frame equals the simulated raw frame of its seq, byte for byte, and is accepted
    by serve's validation (digest, dtype, shape, sequence)."""
    validator = AdcValidator(sensor)
    assert [m.seq for m in msgs] == sorted(expect_indices)
    for m in msgs:
        validator.check(m)
        assert m.header["digest"] == sensor.digest
        assert m.data.dtype == frames[m.seq].dtype and m.data.shape == frames[m.seq].shape
        assert np.array_equal(m.data, frames[m.seq])
    return validator


# ---- end to end over a datagram file (exact) --------------------------------------------------

def test_file_mode_impaired_stream_publishes_exactly_the_complete_frames(tmp_path):
    sensor = small_sensor()
    layout = parse_layout(LAYOUT_A, "A")
    n_frames = 30
    frames = raw_frames(sensor, n_frames)
    fb = 1536
    stream = b"".join(encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames)
    assert len(stream) == n_frames * fb
    packets = packetize(stream, 200, header_a, fb)  # 200 does not divide 1536: datagrams span frames
    sent, withheld = impair(packets, np.random.default_rng(7), n_lost=6, n_dup=8, n_swap=10)
    counts, dropped = expected_counts(sent, withheld, fb)
    assert 3 <= len(dropped) <= 12 and counts["reordered"] >= 10
    path = tmp_path / "a.dgram"
    write_file(path, [p[3] for p in sent])

    stats, msgs = run_file(layout, sensor, path)
    for k, v in counts.items():
        assert stats[k] == v, k
    assert stats["packets"] == len(sent) and stats["malformed"] == 0 and stats["late"] == 0
    assert stats["frames_dropped"] == len(dropped)
    assert stats["drop_reasons"] == {"incomplete": len(dropped)}
    assert stats["frames_complete"] == stats["frames_published"] == n_frames - len(dropped)
    assert stats["frame_number_mismatches"] == 0
    validator = check_published(msgs, frames, sensor, set(range(n_frames)) - dropped)
    assert len({m.run for m in msgs}) == 1
    # serve would count the dropped frames as sequence gaps (those before the last published frame)
    assert validator.sequence_gaps == len([k for k in dropped if k < max(m.seq for m in msgs)])
    # timestamps from a file: frame index x frame period
    assert all(m.timestamp_s == pytest.approx(m.seq * sensor.frame_period_s) for m in msgs)


def test_other_interleaving_and_swapped_iq_matched_by_configuration_alone(tmp_path):
    """The same frames sent as ["chirp", "sample", "rx", "iq"], Q first, big-endian samples, a sized
    payload with padding and a one-byte counter that wraps every 256 datagrams."""
    sensor = small_sensor()
    layout = parse_layout(LAYOUT_B, "B")
    n_frames = 40
    frames = raw_frames(sensor, n_frames)
    fb = 1536
    stream = b"".join(encode_frame(f, ["chirp", "sample", "rx", "iq"], "qi", byte_order="big") for f in frames)
    packets = packetize(stream, 176, header_b, fb, padding=PADDING_B)
    assert len(packets) > 256  # the counter wraps
    sent, withheld = impair(packets, np.random.default_rng(11), n_lost=4, n_dup=5, n_swap=8)
    counts, dropped = expected_counts(sent, withheld, fb)
    path = tmp_path / "b.dgram"
    write_file(path, [p[3] for p in sent])
    stats, msgs = run_file(layout, sensor, path)
    for k, v in counts.items():
        assert stats[k] == v, k
    assert stats["frames_dropped"] == len(dropped)
    check_published(msgs, frames, sensor, set(range(n_frames)) - dropped)

    # and a clean stream of the same frames in layout A gives identical frames
    stream_a = b"".join(encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames)
    write_file(tmp_path / "a.dgram", [p[3] for p in packetize(stream_a, 512, header_a, fb)])
    stats_a, msgs_a = run_file(parse_layout(LAYOUT_A), sensor, tmp_path / "a.dgram")
    assert stats_a["frames_dropped"] == 0 and len(msgs_a) == n_frames
    by_seq = {m.seq: m for m in msgs_a}
    for m in msgs:
        assert m.data.tobytes() == by_seq[m.seq].data.tobytes()


@pytest.mark.parametrize("iq_order,axes", [("iq", ["iq", "chirp", "rx", "sample"]),
                                           ("qi", ["chirp", "iq", "rx", "sample"])])
def test_packed_12bit_round_trip_with_wrapping_16bit_offsets(iq_order, axes):
    """Packed 12-bit samples, with byte offsets and counters of 16 bits that wrap (60 frames of 1152
    bytes span 69120 > 65536 bytes): frame numbers keep counting past the wrap."""
    sensor = sensor_12bit()
    layout = parse_layout(LAYOUT_C % (iq_order, axes), "C")
    frames = raw_frames(sensor, 60)
    assert max(int(np.abs(f).max()) for f in frames) > 100  # the targets are there, not just noise
    fb = 384 * 2 * 3 // 2
    stream = b"".join(encode_frame(f, axes, iq_order, "packed12") for f in frames)
    assert len(stream) == 60 * fb > 65536
    r = Reassembler(layout, sensor)
    got = []
    for _, _, _, dg in packetize(stream, 300, header_c, fb):
        got += r.feed(dg)
    got += r.flush()
    assert [f.index for f in got] == list(range(60))
    for f in got:
        assert f.data.dtype == np.dtype("<i2") and np.array_equal(f.data, frames[f.index])
    assert r.stats()["frames_dropped"] == 0 and r.stats()["lost"] == 0


def test_real_sampling_packed_and_float_sensor():
    # real sampling: no iq axis; packed 12-bit
    sensor = sensor_12bit(sampling="real")
    layout = parse_layout(LAYOUT_C.replace('iq_order = "%s"', 'iq_order = "real"') % '["chirp", "sample", "rx"]')
    frames = raw_frames(sensor, 3)
    assert frames[0].shape == (6, 4, 16)
    stream = b"".join(encode_frame(f, ["chirp", "sample", "rx"], "real", "packed12") for f in frames)
    r = Reassembler(layout, sensor)
    got = [f for _, _, _, dg in packetize(stream, 100, header_c, 576) for f in r.feed(dg)] + r.flush()
    assert [f.index for f in got] == [0, 1, 2]
    assert all(np.array_equal(f.data, frames[f.index]) for f in got)

    # a float32 sensor: int16 stream samples become complex64 frames of the same values
    fsensor = small_sensor(sample_type="float32")
    ref = [np.rint(f) for f in raw_frames(fsensor, 2)]
    as_pairs = [np.stack([f.real, f.imag], axis=-1).astype(np.int16) for f in ref]
    stream = b"".join(encode_frame(p, ["chirp", "rx", "sample", "iq"], "iq") for p in as_pairs)
    r = Reassembler(parse_layout(LAYOUT_A), fsensor)
    got = [f for _, _, _, dg in packetize(stream, 700, header_a, 1536) for f in r.feed(dg)] + r.flush()
    assert [f.index for f in got] == [0, 1]
    for f in got:
        assert f.data.dtype == np.dtype("<c8") and np.array_equal(f.data, ref[f.index])


def test_window_gives_up_a_frame_whose_datagram_comes_too_late():
    """A datagram held back by more than the window (3 frames) arrives after its frame was dropped."""
    sensor = small_sensor()
    frames = raw_frames(sensor, 10)
    stream = b"".join(encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames)
    packets = packetize(stream, 256, header_a, 1536)  # 6 datagrams per frame, aligned
    late = packets[8]  # frame 1; frame 4 begins with datagram 24, which gives frame 1 up
    for delay, lost, reordered in ((20, 0, 1), (40, 1, 0)):
        # 20 datagrams late: out of the frame window, still inside the counter window (the larger of
        # 4 frames = 24 datagrams and 2 x RESTART_PACKETS = 32): reordered and late. 40: out of both:
        # counted lost, then late when it shows up (held as a possible restart, then given up).
        order = packets[:8] + packets[9:9 + delay] + [late] + packets[9 + delay:]
        r = Reassembler(parse_layout(LAYOUT_A), sensor, window_frames=3)
        got = [f for p in order for f in r.feed(p[3])] + r.flush()
        s = r.stats()
        assert [f.index for f in got] == [0] + list(range(2, 10))
        assert s["frames_dropped"] == 1 and s["drop_reasons"] == {"incomplete": 1} and s["missing_bytes"] == 256
        assert (s["late"], s["lost"], s["reordered"]) == (1, lost, reordered)
        assert all(np.array_equal(f.data, frames[f.index]) for f in got)
    # with a window of 6 frames the same 20-datagram delay costs nothing
    order = packets[:8] + packets[9:29] + [late] + packets[29:]
    r = Reassembler(parse_layout(LAYOUT_A), sensor, window_frames=6)
    got = [f for p in order for f in r.feed(p[3])] + r.flush()
    assert [f.index for f in got] == list(range(10)) and r.stats()["reordered"] == 1
    assert r.stats()["late"] == 0 and r.stats()["frames_dropped"] == 0
    assert all(np.array_equal(f.data, frames[f.index]) for f in got)


def test_frames_lost_whole_count_as_unseen_and_frame_number_checks_the_frame_size():
    sensor = small_sensor()
    frames = raw_frames(sensor, 12)
    stream = b"".join(encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames)
    packets = packetize(stream, 512, header_a, 1536)  # 3 datagrams per frame
    order = [p for p in packets if not 3 * 4 <= p[0] < 3 * 6]  # frames 4 and 5 never arrive
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = [f for p in order for f in r.feed(p[3])] + r.flush()
    s = r.stats()
    assert [f.index for f in got] == [0, 1, 2, 3] + list(range(6, 12))
    assert s["frames_dropped"] == 2 and s["drop_reasons"] == {"unseen": 2} and s["lost"] == 6
    assert s["frame_number_mismatches"] == 0

    # the board streams 6-chirp frames but the description says 12 chirps: frame numbers disagree
    r = Reassembler(parse_layout(LAYOUT_A), small_sensor(loops=4))
    for p in packets:
        r.feed(p[3])
    assert r.stats()["frame_number_mismatches"] > 0


def test_a_restarted_stream_is_followed_as_a_new_run(tmp_path):
    sensor = small_sensor()
    frames = raw_frames(sensor, 14)
    enc = [encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames]
    first = packetize(b"".join(enc[:10]), 300, header_a, 1536, seq0=5000)
    second = packetize(b"".join(enc[10:]), 300, header_a, 1536)  # counter and offset start again at 0
    path = tmp_path / "r.dgram"
    write_file(path, [p[3] for p in first + second])
    stats, msgs = run_file(parse_layout(LAYOUT_A), sensor, path)
    assert stats["restarts"] == 1 and stats["frames_dropped"] == 0 and stats["lost"] == 0 and stats["late"] == 0
    assert [m.seq for m in msgs] == list(range(10)) + list(range(4))
    runs = [m.run for m in msgs]
    assert len(set(runs[:10])) == 1 and len(set(runs[10:])) == 1 and runs[0] != runs[10]
    for m, f in zip(msgs, frames):
        assert np.array_equal(m.data, f)
    validator = AdcValidator(sensor)
    for m in msgs:
        validator.check(m)
    assert validator.source_restarts == 1


def test_example_layout_with_the_bundled_sensor(tmp_path):
    sensor = load_sensor(YARD_SENSOR)
    layout = load_layout(SAMPLES / "example_layout.toml")
    frames = raw_frames(sensor, 3)
    fb = 96 * 4 * 128 * 4
    stream = b"".join(encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames)

    def header(seq, offset, frame_bytes, n):  # the header the example's comment describes
        return struct.pack("<HHIQII", 0x0101, n, seq, offset, offset // frame_bytes, 0)

    path = tmp_path / "yard.dgram"
    write_file(path, [p[3] for p in packetize(stream, 1400, header, fb, padding=b"\0" * 3)])
    stats, msgs = run_file(layout, sensor, path, frames=2)
    assert stats["frames_published"] == 2 and stats["frame_number_mismatches"] == 0
    check_published(msgs, frames, sensor, {0, 1})


def test_datagram_file_reader(tmp_path, adapter_log):
    path = tmp_path / "d.dgram"
    data = [b"", b"x" * 7, bytes(range(256)) * 4]
    write_file(path, data)
    assert [bytes(v) for v in iter_datagram_file(path)] == data
    assert adapter_records(adapter_log) == []
    # a truncated tail is reported (a warning) and ignored
    with open(path, "ab") as f:
        f.write(struct.pack("<I", 100) + b"abc")
    assert [bytes(v) for v in iter_datagram_file(path)] == data
    warnings = adapter_records(adapter_log, logging.WARNING)
    assert len(warnings) == 1 and "truncated" in warnings[0].getMessage() and str(path) in warnings[0].getMessage()
    # a length no UDP datagram can have (its length field is 16 bits: Postel, RFC 768, 1980)
    bad = tmp_path / "bad.dgram"
    bad.write_bytes(struct.pack("<I", 70000) + b"\0" * 10)
    with pytest.raises(CubecastError, match="70000"):
        list(iter_datagram_file(bad))


# ---- live UDP on 127.0.0.1 ----------------------------------------------------------------------

def send_paced(address, datagrams, burst=8, pause_s=0.002):
    """Send on loopback in small bursts with pauses, so the receiver is never flooded."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        for i, d in enumerate(datagrams):
            s.sendto(d, address)
            if i % burst == burst - 1:
                time.sleep(pause_s)


def run_udp_live(layout, sensor, datagrams, saved):
    """Run the adapter on udp://127.0.0.1 (a free port), saving what it receives to `saved`; send the
    datagrams paced; stop once it counted them all or after 5 s (loopback may lose some). Returns
    (final stats, the adc messages a SUB received)."""
    a = StreamAdapter(layout, sensor, "tcp://127.0.0.1:*", listen="udp://127.0.0.1:0", wait_s=10,
                      save_datagrams=saved, rcvbuf_bytes=4 * 1024 * 1024)
    col = Collector(a.bind())
    stop = threading.Event()
    result = {}
    t = threading.Thread(target=lambda: result.update(a.run(stop)), daemon=True)
    t.start()
    try:
        assert a.ready.wait(10)
        send_paced(a.udp_address, datagrams)
        wait_until(lambda: a.stats()["packets"] >= len(datagrams), 5)  # datagrams lost on loopback end it at 5 s
        stop.set()
        t.join(10)
        assert not t.is_alive()
        assert col.wait_for(lambda c: len(c.of("adc")) >= result["frames_published"], 10)
        return result, col.of("adc")
    finally:
        stop.set()
        col.close()


def test_udp_live_matches_the_simulated_frames_and_the_saved_datagrams(tmp_path):
    """Live over UDP on 127.0.0.1. Loopback can itself drop datagrams when the machine is busy, so
    the exact checks are: every published frame equals its simulated frame; the adapter's losses are
    at least the withheld datagrams; when it saw exactly those losses, the dropped frames are exactly
    the frames they touched. The datagrams it saved (--save-datagrams) replayed from the file give
    the same frames and counters, whatever loopback did."""
    sensor = small_sensor()
    layout = parse_layout(LAYOUT_A, "A")
    n_frames = 40
    frames = raw_frames(sensor, n_frames)
    fb = 1536
    stream = b"".join(encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames)
    packets = packetize(stream, 400, header_a, fb)
    sent, withheld = impair(packets, np.random.default_rng(5), n_lost=5, n_dup=6, n_swap=8)
    counts, dropped = expected_counts(sent, withheld, fb)
    saved = tmp_path / "live.dgram"
    s, msgs = run_udp_live(layout, sensor, [p[3] for p in sent], saved)
    on_wire_loss = len(sent) - s["packets"]
    assert s["malformed"] == 0 and s["lost"] >= counts["lost"]
    for m in msgs:
        assert np.array_equal(m.data, frames[m.seq])
    if on_wire_loss == 0 and s["lost"] == counts["lost"]:
        assert s["duplicates"] == counts["duplicates"] and s["reordered"] == counts["reordered"]
        assert s["frames_dropped"] == len(dropped)
        assert [m.seq for m in msgs] == sorted(set(range(n_frames)) - dropped)
    else:  # loopback lost some datagrams itself: more frames may be dropped, none may be wrong
        print(f"loopback dropped {on_wire_loss} datagrams; adapter counted {s['lost']} lost")
        assert s["frames_dropped"] >= len(dropped) and len(msgs) <= n_frames - len(dropped)
    # the saved datagrams through the file path: the same frames and counters
    stats_f, msgs_f = run_file(layout, sensor, saved)
    for k in ("packets", "duplicates", "reordered", "lost", "late", "frames_complete", "frames_dropped"):
        assert stats_f[k] == s[k], k
    assert [m.data.tobytes() for m in msgs_f] == [m.data.tobytes() for m in msgs]


def _adapter_command(*args):
    code = ("import argparse, sys\n"
            "from cubecast.daemon.adapter import add_parser\n"
            "from cubecast.daemon.logs import configure\n"
            "configure()\n"  # what the cubecast command does before it runs a subcommand
            "p = argparse.ArgumentParser(prog='cubecast')\n"
            "add_parser(p.add_subparsers(dest='command', required=True))\n"
            "a = p.parse_args(sys.argv[1:])\n"
            "sys.exit(a.func(a))\n")
    return [sys.executable, "-c", code, "adapter", *args]


def test_cli_stops_cleanly_on_sigterm_and_reports(tmp_path):
    layout = tmp_path / "layout.toml"
    layout.write_text(LAYOUT_A)
    sensor = tmp_path / "sensor.toml"
    sensor.write_text(sensor_text(**SMALL))
    proc = subprocess.Popen(_adapter_command("--listen", "udp://127.0.0.1:0", "--layout", str(layout), "--sensor",
                                             str(sensor), "--pub", "tcp://127.0.0.1:0"),
                            cwd=REPO, stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stderr.readline()  # after at most 1 s of waiting for a subscriber
        assert "listening on udp 127.0.0.1:" in line, line
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0
    assert "published 0 frames" in err


# ---- errors a user can cause ----------------------------------------------------------------------

def _mutate(text, old, new):
    assert old in text
    return text.replace(old, new, 1)


@pytest.mark.parametrize("old,new,expected", [
    ("size_bytes = 4\ntype", "size_bytes = 9\ntype", ["'seq' size_bytes = 9", "must be in [1, 8]"]),
    ("size_bytes = 4\ntype", "size_bytes = 2.5\ntype", ["size_bytes = 2.5", "must be a whole number"]),
    ('name = "flags"\n', "", ["[[packet.field]] #2 name is missing"]),
    ('meaning = "packet_sequence"', 'meaning = "counter"', ["meaning = 'counter'", "must be one of"]),
    ('type = "uint"\nbyte_order = "little"\nmeaning = "byte_offset"',
     'type = "int"\nbyte_order = "little"\nmeaning = "byte_offset"', ["'offset'", "type = 'int'", "'uint'"]),
    ("header_size_bytes = 16", "header_size_bytes = 14", ["'frame'", "offset_bytes = 12", "inside the header"]),
    ("offset_bytes = 4\nsize_bytes = 2", "offset_bytes = 3\nsize_bytes = 2", ["overlap", "'seq'"]),
    ('meaning = "packet_sequence"', 'meaning = "ignore"', ["meaning = 'packet_sequence'", "needs one"]),
    ('meaning = "frame_number"', 'meaning = "byte_offset"', ["2 fields", "byte_offset"]),
    ('byte_order = "big"', 'byte_order = "network"', ["byte_order = 'network'", "'little', 'big'"]),
    ('axis_order = ["chirp", "rx", "sample", "iq"]', 'axis_order = ["chirp", "rx", "iq"]',
     ["axis_order = ['chirp', 'rx', 'iq']", "chirp, rx, sample and iq once each"]),
    ('axis_order = ["chirp", "rx", "sample", "iq"]', 'axis_order = ["chirp", "rx", "rx", "iq"]', ["axis_order"]),
    ('iq_order = "iq"', 'iq_order = "ab"', ["iq_order = 'ab'", "'iq', 'qi', 'real'"]),
    ('type = "int16"', 'type = "int12"', ["[samples] type = 'int12'", "'int16', 'packed12'"]),
    ('type = "int16"', 'type = "packed12"', ["byte_order = 'little'", "int16 samples only"]),
    ("[samples]", "[samples]\nscale = 2", ["[samples] unknown field scale"]),
    ("[samples]", "[samples]\niq_ordr = 1", ["[samples] unknown field iq_ordr (did you mean iq_order?)"]),
    ("[packet]", "[packets]\n[packet]", ["unknown section [packets] (did you mean [packet]?)",
                                         "a stream layout has [layout], [packet] and [samples]"]),
    ('name = "flags"', 'name = "seq"', ["name = 'seq'", "unique"]),
    ("header_size_bytes = 16", "header_size_bytes = -1", ["[packet] header_size_bytes = -1", "must be in [0, 65534]"]),
    ("header_size_bytes = 16", "header_size_bytes = 16\nheader_size_bytes = 17", ["not valid TOML"]),
])
def test_bad_layouts_name_field_value_and_rule(old, new, expected):
    with pytest.raises(CubecastError) as info:
        parse_layout(_mutate(LAYOUT_A, old, new), "bad.toml")
    msg = str(info.value)
    assert msg.startswith("bad.toml: ")
    for part in expected:
        assert part in msg, (part, msg)


def test_a_layout_file_that_cannot_be_read_is_named(tmp_path):
    with pytest.raises(CubecastError, match=r"cannot read stream layout .*absent\.toml"):
        load_layout(tmp_path / "absent.toml")
    latin1 = tmp_path / "latin1.toml"
    latin1.write_bytes(LAYOUT_A.replace("test board A", "test board \xe9").encode("latin-1"))
    with pytest.raises(CubecastError, match=r"cannot read stream layout .*latin1\.toml: not UTF-8"):
        load_layout(latin1)


def test_layout_and_sensor_must_agree_and_options_are_checked(tmp_path):
    with pytest.raises(CubecastError, match="iq_order = 'iq'.*real"):
        Reassembler(parse_layout(LAYOUT_A), small_sensor(sampling="real"))
    with pytest.raises(CubecastError, match="iq_order = 'real'.*'iq' or 'qi'"):
        Reassembler(parse_layout(LAYOUT_C.replace('iq_order = "%s"', 'iq_order = "real"')
                                 % '["chirp", "sample", "rx"]'), small_sensor())
    # 1 loop x 3 TX x 3 RX x 9 samples = 81 real samples: an odd count cannot be packed in pairs
    odd = parse_sensor(sensor_text(loops=1, n_rx=3, samples=9, sampling="real"), "odd")
    with pytest.raises(CubecastError, match="packed12.*81 samples.*even"):
        Reassembler(parse_layout(LAYOUT_C.replace('iq_order = "%s"', 'iq_order = "real"')
                                 % '["chirp", "sample", "rx"]'), odd)
    with pytest.raises(CubecastError, match="window-frames 0"):
        Reassembler(parse_layout(LAYOUT_A), small_sensor(), window_frames=0)
    for bad in ("tcp://127.0.0.1:5", "udp://127.0.0.1", "udp://127.0.0.1:70000", "udp://:5"):
        with pytest.raises(CubecastError, match="--listen"):
            parse_udp_endpoint(bad)
    assert parse_udp_endpoint("udp://0.0.0.0:5700") == (socket.AF_INET, "0.0.0.0", 5700)
    assert parse_udp_endpoint("udp://[::1]:5700") == (socket.AF_INET6, "::1", 5700)
    layout, sensor = parse_layout(LAYOUT_A), small_sensor()
    with pytest.raises(CubecastError, match="exactly one of --listen"):
        StreamAdapter(layout, sensor, "tcp://127.0.0.1:*")
    with pytest.raises(CubecastError, match="--file .*no such file"):
        StreamAdapter(layout, sensor, "tcp://127.0.0.1:*", file=tmp_path / "missing.dgram")
    with pytest.raises(CubecastError, match="--frames -1"):
        StreamAdapter(layout, sensor, "tcp://127.0.0.1:*", listen="udp://127.0.0.1:0", frames=-1)


def test_adapter_parameters_and_file_errors_name_what_is_wrong(tmp_path):
    layout, sensor = parse_layout(LAYOUT_A), small_sensor()
    for kw, text in ((dict(health_interval_s=0), "health_interval_s = 0: must be a number of seconds > 0"),
                     (dict(health_interval_s=float("inf")), "health_interval_s = inf"),
                     (dict(wait_s=-1), "wait_s = -1: must be a number of seconds >= 0"),
                     (dict(rcvbuf_bytes=0), "rcvbuf_bytes = 0: must be a whole number of bytes > 0"),
                     (dict(rcvbuf_bytes=2.5), "rcvbuf_bytes = 2.5")):
        with pytest.raises(CubecastError) as info:
            StreamAdapter(layout, sensor, "tcp://127.0.0.1:*", listen="udp://127.0.0.1:0", **kw)
        assert text in str(info.value)
    # a full disk while saving (Linux's /dev/full fails every write with ENOSPC)
    from cubecast.daemon.adapter import DatagramFileWriter
    with pytest.raises(CubecastError, match=r"--save-datagrams /dev/full: cannot (write|finish).*No space"):
        w = DatagramFileWriter("/dev/full")
        for _ in range(10_000):
            w.write(b"x" * 100)
        w.close()
    with pytest.raises(CubecastError, match=r"--file .*: cannot open: Is a directory"):
        list(iter_datagram_file(tmp_path))


def test_malformed_datagrams_are_counted_not_used():
    sensor = small_sensor()
    frames = raw_frames(sensor, 2)
    stream = b"".join(encode_frame(f, ["chirp", "sample", "rx", "iq"], "qi", byte_order="big") for f in frames)
    packets = packetize(stream, 512, header_b, 1536)
    r = Reassembler(parse_layout(LAYOUT_B), sensor)
    got = r.feed(b"\x01\x02\x03")  # shorter than the 12-byte header
    got += r.feed(header_b(99, 0, 1536, 600) + b"\0" * 100)  # claims 600 payload bytes, holds 100
    for p in packets:
        got += r.feed(p[3])
    got += r.flush()
    s = r.stats()
    assert s["malformed"] == 2 and s["malformed_reasons"] == {"short": 1, "payload_size": 1}
    assert [f.index for f in got] == [0, 1] and all(np.array_equal(f.data, frames[f.index]) for f in got)


def test_cli_parser_wiring():
    p = argparse.ArgumentParser(prog="cubecast")
    add_parser(p.add_subparsers(dest="command", required=True))
    a = p.parse_args(["adapter", "--file", "x.dgram", "--layout", "l.toml", "--sensor", "s.toml"])
    assert a.file == "x.dgram" and a.listen is None and a.pub == "tcp://127.0.0.1:5601" and a.frames == 0
    assert a.window_frames == 3 and a.speed == "1" and callable(a.func)
    with pytest.raises(SystemExit):
        p.parse_args(["adapter", "--file", "x", "--listen", "udp://127.0.0.1:1", "--layout", "l", "--sensor", "s"])


def test_serve_turns_the_adapter_frames_into_the_offline_point_clouds(tmp_path):
    """The bundled capture's frames, streamed in the example layout, go adapter -> serve; serve's point
    clouds are byte for byte those of the chain run offline on the same frames (README "Wire format": `points`)."""
    from cubecast.daemon.capture import CaptureReader
    from cubecast.daemon.chain.pipeline import Pipeline
    from cubecast.daemon.files import capture_sensor
    from cubecast.daemon.process import process_frames
    from tests.test_service import YARD, running_service
    n = 4
    with CaptureReader(YARD) as r:
        sensor = capture_sensor(r)
        captured = [r.read(i) for i in range(n)]
        records = process_frames(r, Pipeline(sensor))[:n]
    assert [f.timestamp_s for f in captured] == [k * sensor.frame_period_s for k in range(n)]
    fb = 96 * 4 * 128 * 4
    stream = b"".join(encode_frame(f.payload, ["chirp", "rx", "sample", "iq"], "iq") for f in captured)

    def header(seq, offset, frame_bytes, size):
        return struct.pack("<HHIQII", 0x0101, size, seq, offset, offset // frame_bytes, 0)

    path = tmp_path / "yard.dgram"
    write_file(path, [p[3] for p in packetize(stream, 1456, header, fb)])
    a = StreamAdapter(load_layout(SAMPLES / "example_layout.toml"), sensor, "tcp://127.0.0.1:*", file=path,
                      speed=None, wait_s=30)
    ep = a.bind()
    with running_service(sensor, ep, queue_depth=16) as svc:
        col = Collector(svc.pub_endpoint)
        try:
            assert col.wait_for(lambda c: c.of("sensor"), 10)
            assert a.run()["frames_published"] == n
            assert col.wait_for(lambda c: len(c.of("points")) >= n, 30)
            clouds = col.of("points")
        finally:
            col.close()
        assert svc.stats()["frames_rejected"] == 0
    assert [m.seq for m in clouds] == list(range(n))
    for m, rec in zip(clouds, records):
        assert len(rec) > 0 and m.data.tobytes() == rec.tobytes()


def test_health_lines_while_running_and_the_summary(tmp_path, adapter_log):
    """Paced at the frame period (0.1 s), 6 frames take 0.5 s: with a 0.1 s health interval the adapter
    reports its counters several times, names the first datagram's fields, logs the dropped frame."""
    sensor = small_sensor()
    frames = raw_frames(sensor, 6)
    stream = b"".join(encode_frame(f, ["chirp", "rx", "sample", "iq"], "iq") for f in frames)
    packets = packetize(stream, 512, header_a, 1536)
    path = tmp_path / "h.dgram"
    write_file(path, [p[3] for i, p in enumerate(packets) if i != 7])  # frame 2 loses a datagram
    a = StreamAdapter(parse_layout(LAYOUT_A), sensor, "tcp://127.0.0.1:*", file=path, speed=1.0, wait_s=0,
                      health_interval_s=0.1)
    s = a.run()
    assert s["frames_published"] == 5 and s["frames_dropped"] == 1 and s["lost"] == 1
    info = [r.getMessage() for r in adapter_records(adapter_log, logging.INFO)]
    warnings = [r.getMessage() for r in adapter_records(adapter_log, logging.WARNING)]
    assert any(line.startswith("cubecast adapter: first datagram: seq 0, flags -2, offset 0, frame 100")
               for line in info), info
    assert sum("; published " in line for line in info) >= 2, info
    assert any("frame 2: 512 of 1536 bytes missing" in line for line in warnings), warnings
    assert adapter_records(adapter_log)[-1].getMessage().startswith("cubecast adapter: published 5 frames; packets 17")
    assert logging.getLogger(ADAPTER_LOGGER).filters == []  # the rate limit is the run's own


def test_cli_quiet_only_sets_the_log_level(tmp_path, capsys):
    """cubecast adapter -q: the warning of a truncated datagram file passes, the start, health and summary
    lines do not (the shared -q of every subcommand, after the subcommand's name)."""
    from cubecast.daemon import cli
    sensor = small_sensor()
    stream = encode_frame(raw_frames(sensor, 1)[0], ["chirp", "rx", "sample", "iq"], "iq")
    path = tmp_path / "q.dgram"
    write_file(path, [p[3] for p in packetize(stream, 512, header_a, 1536)])
    with open(path, "ab") as f:
        f.write(b"\x01")
    (tmp_path / "layout.toml").write_text(LAYOUT_A)
    (tmp_path / "sensor.toml").write_text(sensor_text(**SMALL))
    root = logging.getLogger("cubecast")
    saved = root.level, root.propagate, list(root.handlers)
    try:
        code = cli.main(["adapter", "--file", str(path), "--layout", str(tmp_path / "layout.toml"), "--sensor",
                         str(tmp_path / "sensor.toml"), "--pub", "tcp://127.0.0.1:*", "--speed", "max", "-q"])
        assert code == 0
        assert root.level == logging.WARNING
    finally:
        root.setLevel(saved[0])
        root.propagate = saved[1]
        root.handlers[:] = saved[2]
    lines = capsys.readouterr().err.splitlines()   # the command's handler writes plain lines to stderr
    assert len(lines) == 1 and "truncated" in lines[0], lines
