"""Layouts that cannot be right, diagnosed from the first datagrams (daemon/layoutcheck.py, inside the
Reassembler of daemon/reassembly.py and the adapter of daemon/adapter.py).

The streams are the test encoder's of tests/test_adapter.py (the simulator's raw frames, datagrams packed
by struct); the layout files are the same boards' layouts with one field changed, so the right answer is
known by construction. Stream facts used (README "Stream layout"; common practice for such capture
streams): the counter goes up by one per datagram, the byte offset by the payload size per counter step,
frame k is stream bytes [k F, (k + 1) F), and a frame_number field counts frames. Facts of byte order
(common practice): a little-endian field read big-endian reverses its bytes, so a 4-byte counter n < 256
reads n x 2^24 and an offset 512 k (k < 128) in 6 bytes reads k x 2^33.

Counters stay sane: no counter exceeds the datagrams seen times the datagrams of a frame.
"""

from __future__ import annotations

import logging
import re
import struct
import threading

import numpy as np
import pytest

from cubecast.daemon import cli
from cubecast.daemon.adapter import StreamAdapter
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.layoutcheck import CONFIRM_FRAMES, FRAME_SIZE_EVIDENCE
from cubecast.daemon.reassembly import Reassembler
from cubecast.daemon.streamlayout import load_layout, parse_layout
from tests.helpers import sensor_text
from tests.test_adapter import (LAYOUT_A, LAYOUT_B, SMALL, adapter_records, encode_frame, header_a,
                                header_b, packetize, raw_frames, send_paced, small_sensor, write_file)
from tests.test_adapter import adapter_log  # noqa: F401  (a fixture)
from tests.test_service import Collector, wait_until
from tests.test_streamcheck import AXES, FB, framecut_packets

COUNTS = ("packets", "malformed", "implausible", "duplicates", "reordered", "lost", "late", "used", "frames_complete",
          "frames_dropped", "frame_number_mismatches", "restarts")


def with_field(text, name, **changes):
    """The layout text with the [[packet.field]] `name` changed (key = new value)."""
    start = text.index(f'name = "{name}"')
    end = text.find("[[packet.field]]", start)
    end = text.index("[samples]", start) if end < 0 else end
    block = text[start:end]
    for key, value in changes.items():
        block = re.sub(rf"^{key} = .*$", f"{key} = {value}", block, count=1, flags=re.M)
    return text[:start] + block + text[end:]


WITHOUT_FRAME_NUMBER = with_field(LAYOUT_A, "frame", meaning='"ignore"')


def board_stream(n_frames=12, payload=512, seed=3):
    """A board of the small sensor's frames (6 chirps, 1536 bytes) in LAYOUT_A datagrams."""
    frames = raw_frames(small_sensor(), n_frames, seed=seed)
    stream = b"".join(encode_frame(f, AXES, "iq") for f in frames)
    return frames, packetize(stream, payload, header_a, FB)


def feed_all(r, datagrams):
    got = []
    for d in datagrams:
        got += r.feed(d)
    return got + r.flush()


def check_sane(s, payload, frame_bytes=FB):
    """No counter beyond the datagrams seen times a frame's datagrams (the absurd values a misread header
    once gave), and every datagram counted once."""
    per_frame = -(-frame_bytes // payload)
    for k in COUNTS:
        assert 0 <= s[k] <= s["packets"] * per_frame, (k, s[k])
    assert s["missing_bytes"] <= s["packets"] * per_frame * frame_bytes
    assert s["packets"] == s["malformed"] + s["implausible"] + s["duplicates"] + s["late"] + s["used"] + s["held"]


def diagnosis(layout, datagrams, payload, sensor=None):
    """The one layout error a stream that publishes nothing gives (its counters checked sane)."""
    r = Reassembler(layout, sensor or small_sensor())
    assert feed_all(r, datagrams) == []
    (text,) = r.layout_errors
    check_sane(r.stats(), payload, r.frame_bytes)
    return text


@pytest.fixture
def layout_file(tmp_path):
    def make(text, name="board.toml"):
        path = tmp_path / name
        path.write_text(text)
        return load_layout(path), path
    return make


# ---- header fields --------------------------------------------------------------------------------

def test_a_byte_swapped_offset_is_named_with_its_fix(layout_file):
    _, packets = board_stream()
    layout, path = layout_file(with_field(LAYOUT_A, "offset", byte_order='"big"'))  # the board sends little-endian
    text = diagnosis(layout, [p[3] for p in packets], 512)
    assert text.startswith(f"layout {path}: [[packet.field]] 'offset' (byte_offset, bytes 6..11, big-endian) "
                           f"reads 0, {2**33}, {2**34}, {3 * 2**33}")  # 512 k read big-endian: k 2^33
    assert "byte-swapped" in text and text.endswith('they are 0, 512, 1024, 1536, ...: set byte_order = "little"')


def test_an_8_byte_offset_swapped_and_a_payload_that_does_not_divide_the_frame():
    # layout B's 8-byte big-endian offset, sent little-endian; 176-byte payloads and a one-byte counter
    sensor = small_sensor()
    frames = raw_frames(sensor, 8)
    stream = b"".join(encode_frame(f, ["chirp", "sample", "rx", "iq"], "qi", byte_order="big") for f in frames)

    def header_swapped(seq, offset, frame_bytes, n):
        return header_b(seq, offset, frame_bytes, n)[:4] + struct.pack("<Q", offset)

    packets = packetize(stream, 176, header_swapped, FB, padding=b"\xee" * 5)
    text = diagnosis(parse_layout(LAYOUT_B, "B.toml"), [p[3] for p in packets], 176, sensor)
    assert text.startswith("layout B.toml: [[packet.field]] 'pos' (byte_offset, bytes 4..11, big-endian) reads 0, ")
    assert text.endswith('they are 0, 176, 352, 528, ...: set byte_order = "little"')


def test_a_byte_swapped_counter_steps_by_2_to_the_24(layout_file):
    _, packets = board_stream()
    layout, path = layout_file(with_field(LAYOUT_A, "seq", byte_order='"little"'))  # the board sends big-endian
    text = diagnosis(layout, [p[3] for p in packets], 512)
    assert text == (f"layout {path}: [[packet.field]] 'seq' (packet_sequence, bytes 0..3, little-endian) steps by "
                    f"2^24 = 16777216 per datagram (0, 16777216, 33554432, 50331648, ...), as a byte-swapped counter "
                    f"does; read the other way round (bytes 0..3, big-endian) it counts 0, 1, 2, 3, ..., +1 per "
                    f'datagram: set byte_order = "big"')


def test_a_mis_sized_counter_and_offsets_in_words():
    _, packets = board_stream()
    # the counter declared as 2 bytes at offset 0 of a big-endian 4-byte counter: it reads the high half, 0
    text = diagnosis(parse_layout(with_field(LAYOUT_A, "seq", size_bytes=2), "L"), [p[3] for p in packets], 512)
    assert "'seq' (packet_sequence, bytes 0..1, big-endian) stays the same (0, 0, 0, 0, ...)" in text
    assert text.endswith("read as 4 bytes (bytes 0..3, big-endian) it counts 0, 1, 2, 3, ..., +1 per datagram: "
                         "set size_bytes = 4")
    # offsets counted in 4-byte words: they step by a quarter of the payload
    words = [header_a(s, a // 4, FB, b - a) + dg[16:] for s, a, b, dg in packets]
    text = diagnosis(parse_layout(LAYOUT_A, "L"), words, 512)
    assert "they step by 128, 1/4 of the payload: the board counts 4-byte words" in text


def test_a_header_declared_too_short_is_found_from_the_offsets():
    # the board's header is 20 bytes (4 more after the frame number): the layout says 16, so the payloads
    # look 4 bytes longer than the offsets step
    _, packets = board_stream()
    longer = [dg[:16] + b"\x00" * 4 + dg[16:] for *_, dg in packets]
    text = diagnosis(parse_layout(LAYOUT_A, "L"), longer, 512)
    assert text.endswith("they step by 512: if the header were 20 bytes (header_size_bytes = 20), the payloads "
                         "would be 512 bytes and fit")


def test_a_right_layout_amid_garbage_gets_no_diagnosis():
    # half the datagrams are garbage (tests/test_streamcheck.py): the stream is followed, nothing is misread
    from tests.test_streamcheck import genuine_stream, interleave
    sensor, frames, packets = genuine_stream(10, 200)
    datagrams, _ = interleave(packets, np.random.default_rng(5), len(packets), 200)
    r = Reassembler(parse_layout(LAYOUT_A), sensor)
    got = feed_all(r, datagrams)
    assert [f.index for f in got] == list(range(10)) and r.layout_errors == []


# ---- the frame size ---------------------------------------------------------------------------------

@pytest.mark.parametrize("loops,words", [(1, "twice the sensor's"), (4, "half the sensor's")])
@pytest.mark.parametrize("payload", [512, 200])
def test_a_frame_size_the_frame_numbers_contradict_publishes_nothing(loops, words, payload):
    """The sensor description says 1 (or 4) loops where the board streams 2: frames of half (twice) the
    streamed size. Nothing is published; the message names the board's frame size and the chirps."""
    _, packets = board_stream(payload=payload)
    sensor = small_sensor(loops=loops)
    r = Reassembler(parse_layout(LAYOUT_A, "A.toml"), sensor)
    assert feed_all(r, [p[3] for p in packets]) == []
    s = r.stats()
    assert s["frames_complete"] == 0 and s["drop_reasons"] == {"frame_size": s["frames_dropped"]}
    assert s["frames_dropped"] == 12 * FB // r.frame_bytes  # every would-be frame counted
    (text,) = r.layout_errors
    size = re.search(r"its frames are (\d+) bytes \(\+-(\d+)\) by its frame_number field", text)
    assert size and abs(int(size.group(1)) - FB) <= int(size.group(2)) <= payload // 2, text
    assert words in text and "set [frame] chirps_per_frame = 6 in the sensor description" in text
    assert f"sensor 'test-sensor' has frames of {r.frame_bytes} stream bytes" in text
    assert "the frame_number field 'frame' (layout A.toml) disagrees" in text
    assert [t for k, t in r.events if k == "frame_number"][0].count("off by ") == 1  # signed, not 2^32 - 1
    assert all(re.search(r"off by [+-]\d ", t) for k, t in r.events if k == "frame_number")
    check_sane(s, payload, r.frame_bytes)


@pytest.mark.parametrize("loops,words", [(1, "twice the sensor's"), (4, "half the sensor's")])
def test_a_frame_size_the_cuts_at_frame_ends_contradict_publishes_nothing(loops, words):
    """A board that cuts its datagrams at its frame ends (no frame_number field): a cut where the sensor's
    frame does not end, or a frame end of the sensor's crossed and then a cut."""
    frames = raw_frames(small_sensor(), 12)
    stream = b"".join(encode_frame(f, AXES, "iq") for f in frames)
    packets = framecut_packets(stream, 400)
    sensor = small_sensor(loops=loops)
    text = diagnosis(parse_layout(WITHOUT_FRAME_NUMBER, "cut.toml"), [p[3] for p in packets], 400, sensor)
    assert "the board cuts its datagrams at byte 1536" in text
    assert "its frames are 1536 bytes if the stream began at a frame start" in text and words in text
    assert "set [frame] chirps_per_frame = 6" in text


def test_the_right_frame_size_waits_for_confirmation_then_publishes_everything():
    frames, packets = board_stream()
    r = Reassembler(parse_layout(LAYOUT_A), small_sensor())
    got = []
    for i, p in enumerate(packets):
        got += r.feed(p[3])
        if p[1] < CONFIRM_FRAMES * FB:  # until the stream reaches frame 3, frames 0..2 wait
            assert got == [], i
    assert r.frame_check.state == "confirmed"
    got += r.flush()
    assert [f.index for f in got] == list(range(12)) and r.layout_errors == []
    assert all(np.array_equal(f.data, frames[f.index]) for f in got)
    # a frame-cut board confirms the size by its cuts
    stream = b"".join(encode_frame(f, AXES, "iq") for f in frames)
    r = Reassembler(parse_layout(WITHOUT_FRAME_NUMBER), small_sensor())
    got = [f for p in framecut_packets(stream, 400) for f in r.feed(p[3])]
    assert r.frame_check.framecut and r.frame_check.state == "confirmed"
    assert [f.index for f in got + r.flush()] == list(range(12)) and r.layout_errors == []


def test_a_stream_without_evidence_is_published_unchecked_and_says_so():
    frames, packets = board_stream()
    r = Reassembler(parse_layout(WITHOUT_FRAME_NUMBER), small_sensor(loops=1))  # wrong, but nothing can tell
    got = feed_all(r, [p[3] for p in packets])
    assert len(got) == 24 and r.layout_errors == []
    assert [t for k, t in r.events if k == "unchecked"] == [
        "the frame size of 768 bytes cannot be checked against the stream: no frame_number field, and the board "
        "does not cut its datagrams at frame ends"]


def test_a_few_corrupted_frame_numbers_do_not_stop_a_stream():
    frames, packets = board_stream()
    bad = [i for i in (5, 17, 30)][: FRAME_SIZE_EVIDENCE - 1]
    datagrams = [p[3][:12] + struct.pack("<I", 7777) + p[3][16:] if i in bad else p[3] for i, p in enumerate(packets)]
    r = Reassembler(parse_layout(LAYOUT_A), small_sensor())
    got = [f for d in datagrams for f in r.feed(d)]
    assert r.frame_check.state == "confirmed"
    assert [f.index for f in got + r.flush()] == list(range(12)) and r.layout_errors == []
    assert r.stats()["frame_number_mismatches"] == len(bad)


def test_a_byte_swapped_frame_number_is_named():
    _, packets = board_stream()
    text = diagnosis(parse_layout(with_field(LAYOUT_A, "frame", byte_order='"big"'), "A.toml"), [p[3] for p in packets],
                     512)
    assert text.startswith("layout A.toml: [[packet.field]] 'frame' (frame_number, bytes 12..15, big-endian) steps "
                           "by 2^24 = 16777216 from frame to frame, as a byte-swapped frame number does: set "
                           'byte_order = "little"')


# ---- the adapter: file mode exits 2, live mode counts on ---------------------------------------------

def test_file_mode_stops_with_the_diagnosis_and_exit_2(tmp_path, capsys):
    _, packets = board_stream()
    write_file(tmp_path / "b.dgram", [p[3] for p in packets])
    (tmp_path / "layout.toml").write_text(with_field(LAYOUT_A, "seq", byte_order='"little"'))
    (tmp_path / "sensor.toml").write_text(sensor_text(**SMALL))
    root = logging.getLogger("cubecast")
    saved = root.level, root.propagate, list(root.handlers)
    try:
        code = cli.main(["adapter", "--file", str(tmp_path / "b.dgram"), "--layout", str(tmp_path / "layout.toml"),
                         "--sensor", str(tmp_path / "sensor.toml"), "--pub", "tcp://127.0.0.1:*", "--speed", "max"])
    finally:
        root.setLevel(saved[0])
        root.propagate = saved[1]
        root.handlers[:] = saved[2]
    assert code == 2
    lines = capsys.readouterr().err.splitlines()
    errors = [ln for ln in lines if "cubecast adapter: error: " in ln]
    assert len(errors) == 2  # logged once at ERROR, then the command's one-line error
    assert f"layout {tmp_path / 'layout.toml'}: [[packet.field]] 'seq' (packet_sequence" in errors[0]
    assert errors[-1].startswith(f"cubecast adapter: error: --file {tmp_path / 'b.dgram'}: layout ")
    assert 'set byte_order = "big"' in errors[-1]
    # the summary's counters: none beyond the datagrams read times a frame's 3 datagrams
    (summary,) = [ln for ln in lines if "published 0 frames; packets " in ln]
    numbers = [int(n) for n in re.findall(r"\d+", summary.split("; packets ")[1])]
    assert numbers[0] <= len(packets) and all(n <= numbers[0] * 3 for n in numbers)


def test_file_mode_a_wrong_frame_size_raises(tmp_path, adapter_log):
    _, packets = board_stream()
    write_file(tmp_path / "b.dgram", [p[3] for p in packets])
    a = StreamAdapter(parse_layout(LAYOUT_A, "A.toml"), small_sensor(loops=1), "tcp://127.0.0.1:*",
                      file=tmp_path / "b.dgram", speed=None, wait_s=0)
    with pytest.raises(CubecastError, match=r"--file .*b\.dgram: sensor 'test-sensor' has frames of 768 .* twice"):
        a.run()
    assert a.frames_published == 0
    errors = [r.getMessage() for r in adapter_records(adapter_log, logging.ERROR)]
    assert len(errors) == 1 and "frames are not published" in errors[0]


def test_live_mode_counts_on_and_says_so(adapter_log):
    """Over UDP on 127.0.0.1 with a frame size half the streamed one: the adapter keeps running and counting,
    publishes nothing, logs the diagnosis once, and the health lines after it say that it stands. Every wait
    is bounded (5 s); loopback may lose datagrams, so only what arrived is counted."""
    frames, packets = board_stream(n_frames=10)
    a = StreamAdapter(parse_layout(LAYOUT_A, "A.toml"), small_sensor(loops=1), "tcp://127.0.0.1:*",
                      listen="udp://127.0.0.1:0", wait_s=0, health_interval_s=0.01)
    col = Collector(a.bind())
    stop = threading.Event()
    t = threading.Thread(target=a.run, args=(stop,), daemon=True)
    t.start()

    def said_twice():
        records = adapter_records(adapter_log)
        errors = [i for i, r in enumerate(records) if r.levelno == logging.ERROR]
        return errors and any("; the layout error above stands" in r.getMessage() for r in records[errors[0]:])

    try:
        assert a.ready.wait(5)
        send_paced(a.udp_address, [p[3] for p in packets])
        assert wait_until(said_twice, 5)
        more = packets[-1][0] + 1  # the board goes on: still counted
        send_paced(a.udp_address, [header_a(more + i, 10 * FB + 512 * i, FB, 512) + bytes(512) for i in range(3)])
        assert wait_until(lambda: a.stats()["packets"] > len(packets) - 5, 5)
    finally:
        stop.set()
        t.join(5)
        col.close()
    assert not t.is_alive()
    s = a.last_health
    assert s["frames_published"] == 0 and col.of("adc") == [] and s["frames_complete"] == 0
    check_sane(s, 512, 768)
    records = adapter_records(adapter_log)
    errors = [i for i, r in enumerate(records) if r.levelno == logging.ERROR]
    assert len(errors) == 1 and "twice the sensor's" in records[errors[0]].getMessage()
    health = [(i, r.getMessage()) for i, r in enumerate(records) if "; published " in r.getMessage()]
    assert all(m.endswith("; the layout error above stands") == (i > errors[0]) for i, m in health)
    assert records[-1].getMessage().startswith("cubecast adapter: published 0 frames; packets ")


def test_a_byte_swapped_payload_size_is_named():
    # layout B's payload_size is big-endian; a board that sends it little-endian: 176 = 0x00b0 reads 0xb000
    sensor = small_sensor()
    frames = raw_frames(sensor, 4)
    stream = b"".join(encode_frame(f, ["chirp", "sample", "rx", "iq"], "qi", byte_order="big") for f in frames)

    def header_le_size(seq, offset, frame_bytes, n):
        h = header_b(seq, offset, frame_bytes, n)
        return h[:2] + struct.pack("<H", n) + h[4:]

    packets = packetize(stream, 176, header_le_size, FB, padding=b"\xee" * 5)
    text = diagnosis(parse_layout(LAYOUT_B, "B.toml"), [p[3] for p in packets], 176, sensor)
    assert text.startswith(f"layout B.toml: [[packet.field]] 'len' (payload_size, bytes 2..3, big-endian) reads "
                           f"{0xb000}, {0xb000}, {0xb000}, {0xb000}, ... for datagrams with 181, 181, 181, 181, ... "
                           f"bytes after the 12-byte header")
    assert text.endswith('read the other way round (bytes 2..3, little-endian) it is 176, 176, 176, 176, ...: set '
                         'byte_order = "little"')
