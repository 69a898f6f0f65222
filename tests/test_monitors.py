"""The front end's monitors at the edges (issue 16): the `frontend` wire kind and its refusals, the
warnings' thresholds and wording, the summary over many frames (health's `frontend`, process's
summary and CSV), serve publishing the monitor of every frame over 127.0.0.1 with and without workers,
and the viewer's flag and per-channel panel, drawn offscreen.

References outside the code under test: clipped samples are counted here with numpy on the very
frames sent (a sample is clipped when |I| or |Q| reaches the ADC's full scale: README "Capture
format", full_scale clips I and Q each); percentages and means are worked out here from the counts
set by hand; the thresholds are README's table ("Front-end monitor"). Every wait is bounded.
"""

from __future__ import annotations

import contextlib
import csv
import logging
import math
import threading

import msgpack
import numpy as np
import pytest

from cubecast.daemon import wire
from cubecast.daemon.capture import CaptureReader, CaptureWriter
from cubecast.daemon.chain.frontend import FRONTEND_DTYPE
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.files import capture_sensor
from cubecast.daemon.frontendout import CSV_COLUMNS
from cubecast.daemon.frontendwarn import (CLIPPED_WARN_FRACTION, DC_WARN_FULL_SCALE_FRACTION, DC_WARN_OVER_NOISE_DB,
                                          IMAGE_REJECTION_WARN_DB, INTERFERENCE_WARN_SHARE, NOISE_FLOOR_WARN_DB,
                                          FrontendSummary, frontend_warnings)
from cubecast.daemon.process import process_capture
from cubecast.daemon.service import Service
from cubecast.daemon.sources import Recorder, ReplaySource
from cubecast.daemon.wire import WireError, decode, encode_frontend, encode_health
from tests.helpers import SAMPLES
from tests.test_service import Collector, connected, run_in_thread, wait_until

YARD = SAMPLES / "yard.cap"
FULL_SCALE = 8191.0          # the bundled sensor's [adc] full_scale
SAMPLES_PER_FRAME = 96 * 128  # chirps x samples per chirp of the bundled sensor, per receive channel
CLIP_RX, CLIP_N, N_FRAMES = 2, 200, 6


# ---- records and messages by hand ------------------------------------------------------------------

def records(**columns) -> np.ndarray:
    """Four channels of FRONTEND_DTYPE: clean unless a column says otherwise."""
    r = np.zeros(4, FRONTEND_DTYPE)
    r["samples"] = SAMPLES_PER_FRAME
    r["noise_floor_db"] = 18.0
    r["dc_offset_counts"] = 0.5
    r["image_rejection_db"] = 50.0
    for name, values in columns.items():
        r[name] = values
    return r


def causes(warnings) -> list[tuple[int, str]]:
    return [(w.rx, w.cause) for w in warnings]


@contextlib.contextmanager
def log_records(name: str, level: int = logging.INFO):
    """Records of one logger (a handler on it: the CLI's set-up stops propagation to the root)."""
    got: list[logging.LogRecord] = []
    handler = logging.Handler(level)
    handler.emit = got.append
    logger = logging.getLogger(name)
    old = logger.level
    logger.addHandler(handler)
    logger.setLevel(level)
    try:
        yield got
    finally:
        logger.removeHandler(handler)
        logger.setLevel(old)


def test_the_wire_layout_is_the_chains():
    assert wire.FRONTEND_RECORD_DTYPE == FRONTEND_DTYPE
    assert [(n, d) for n, _, d in wire.FRONTEND_WIRE_FIELDS] == FRONTEND_DTYPE.descr
    assert wire.WIRE_VERSION == 3 and "frontend" in wire.KINDS


def test_frontend_message_round_trip():
    rec = records(clipped_samples=[0, 5, 160, 0], interference_bursts=[0, 0, 3, 0],
                  interference_samples=[0, 0, 40, 0], noise_floor_db=[18.1, 18.3, 18.0, -np.inf],
                  dc_offset_counts=[0.5, 0.0, 1000.0, np.nan], image_rejection_db=[50.0, 49.0, 20.0, 120.0])
    rec["samples"][0] = 0xFFFFFFFF  # the largest u4
    warnings = [w.as_map() for w in frontend_warnings(rec, FULL_SCALE)]
    assert warnings
    parts = encode_frontend("yard-a", 41, "run-7", 4.1, rec, FULL_SCALE, warnings)
    assert bytes(parts[0]) == b"yard-a/frontend" and bytes(parts[2]) == b""
    # the header as any msgpack reader sees it (msgpack specification, Furuhashi, 2013)
    h = msgpack.unpackb(bytes(parts[1]), raw=False)
    assert (h["wire"], h["kind"], h["sensor_id"], h["seq"], h["run"], h["timestamp_s"]) == (
        3, "frontend", "yard-a", 41, "run-7", 4.1)
    assert h["full_scale"] == FULL_SCALE and h["warnings_total"] == len(warnings) and h["warnings"] == warnings
    assert h["records"]["samples"] == [0xFFFFFFFF] + [SAMPLES_PER_FRAME] * 3
    assert h["records"]["clipped_samples"] == [0, 5, 160, 0]
    assert h["records"]["noise_floor_db"][3] is None and h["records"]["dc_offset_counts"][3] is None  # not finite
    assert h["records"]["image_rejection_db"] == [50.0, 49.0, 20.0, 120.0]
    msg = decode(parts)
    assert msg.kind == "frontend" and msg.seq == 41 and msg.data.dtype == FRONTEND_DTYPE
    for name in FRONTEND_DTYPE.names:
        want = rec[name].astype(np.float64)
        want[~np.isfinite(want)] = np.nan  # nil on the wire, NaN in the decoded records
        np.testing.assert_array_equal(msg.data[name].astype(np.float64), want)
    # at most FRONTEND_MAX_WARNINGS travel, warnings_total counts them all
    many = [warnings[0]] * (wire.FRONTEND_MAX_WARNINGS + 5)
    h = decode(encode_frontend("yard-a", 1, "r", 0.0, rec, FULL_SCALE, many)).header
    assert len(h["warnings"]) == wire.FRONTEND_MAX_WARNINGS and h["warnings_total"] == len(many)


def _mutated(mutate) -> list:
    rec = records(clipped_samples=[0, 0, 160, 0])
    parts = encode_frontend("yard-a", 3, "r", 0.3, rec, FULL_SCALE,
                            [w.as_map() for w in frontend_warnings(rec, FULL_SCALE)])
    h = msgpack.unpackb(bytes(parts[1]), raw=False)
    mutate(h)
    return [parts[0], msgpack.packb(h), b""]


@pytest.mark.parametrize("mutate, reason, text", [
    (lambda h: h["records"]["samples"].__setitem__(1, -1), "malformed",
     "'records.samples' = [12288, -1, 12288, 12288]: must be a list of 1..256 integers in 0..4294967295"),
    (lambda h: h["records"]["samples"].__setitem__(1, 1 << 32), "malformed", "'records.samples'"),
    (lambda h: h["records"]["noise_floor_db"].__setitem__(0, "18"), "malformed",
     "'records.noise_floor_db' = ['18', 18.0, 18.0, 18.0]: must be a list of 1..256 finite numbers or nil"),
    (lambda h: h["records"]["image_rejection_db"].pop(), "shape",
     "'records.image_rejection_db' has 3 entries; 'records.samples' has 4"),
    (lambda h: h["records"]["clipped_samples"].__setitem__(1, 12289), "malformed",
     "'records.clipped_samples' = 12289 (rx 1): must be at most that channel's samples (12288)"),
    (lambda h: h["records"]["interference_bursts"].__setitem__(3, 2), "malformed",
     "'records.interference_bursts' = 2 (rx 3): must be at most that channel's interference_samples (0)"),
    (lambda h: h["records"].pop("dc_offset_counts"), "malformed", "'records.dc_offset_counts' is missing"),
    (lambda h: h["warnings"][0].__setitem__("cause", "gremlins"), "malformed",
     "'warnings[0].cause' = 'gremlins': must be one of clipping, interference"),
    (lambda h: h["warnings"][0].__setitem__("rx", 4), "malformed",
     "'warnings[0].rx' = 4: the message has 4 receive channels (0..3)"),
    (lambda h: h["warnings"][0].pop("text"), "malformed", "'warnings[0].text' is missing"),
    (lambda h: h["warnings"][0].__setitem__("short", ""), "malformed", "'warnings[0].short' = ''"),
    (lambda h: h.__setitem__("warnings_total", 0), "malformed",
     "'warnings_total' = 0: must be at least the 1 warnings the message holds"),
    (lambda h: h.__setitem__("warnings", h["warnings"] * 65), "malformed", "must be a list of at most 64 maps"),
    (lambda h: h.__setitem__("full_scale", 0), "malformed", "'full_scale' = 0: must be a finite number > 0"),
    (lambda h: h.__setitem__("wire", 2), "wire_version", "'wire' = 2: must be the integer 3"),
    (lambda h: h["records"].__setitem__("samples", [1] * 257), "malformed", "'records.samples'"),
])
def test_frontend_refusals_name_the_field_and_value(mutate, reason, text):
    with pytest.raises(WireError) as err:
        decode(_mutated(mutate))
    assert err.value.reason == reason and text in str(err.value), str(err.value)


def test_frontend_message_with_a_payload_is_refused():
    parts = _mutated(lambda h: None)
    with pytest.raises(WireError, match="frontend message has a 4-byte payload; it must be empty"):
        decode([parts[0], parts[1], b"abcd"])


# ---- warnings: thresholds and wording (README "Front-end monitor") ---------------------------------

def test_clipping_and_interference_thresholds():
    # 0.1 % of 12288 samples is 12.288: 13 samples warn, 12 do not
    assert math.ceil(CLIPPED_WARN_FRACTION * SAMPLES_PER_FRAME) == 13
    w = frontend_warnings(records(clipped_samples=[0, 13, 12, 160]), FULL_SCALE)
    assert causes(w) == [(1, "clipping"), (3, "clipping")]
    assert w[0].value == pytest.approx(100 * 13 / 12288) and w[1].value == pytest.approx(100 * 160 / 12288)
    # 160 / 12288 = 1.302 %: two significant figures
    assert w[1].short == "rx 3 clipping 1.3 %"
    assert w[1].text == "rx 3: 1.3 % of samples clipped (a strong near reflector, or too much receiver gain)"
    assert w[0].text.startswith("rx 1: 0.11 % of samples clipped")
    assert math.ceil(INTERFERENCE_WARN_SHARE * SAMPLES_PER_FRAME) == 13
    w = frontend_warnings(records(interference_samples=[13, 12, 0, 300], interference_bursts=[1, 2, 0, 12]),
                          FULL_SCALE)
    assert causes(w) == [(0, "interference"), (3, "interference")]
    assert w[1].short == "rx 3 interference 2.4 %"  # 300 / 12288 = 2.44 %
    assert w[1].text == "rx 3: interference from another radar: 12 bursts, 2.4 % of samples"
    assert w[0].text == "rx 0: interference from another radar: 1 burst, 0.11 % of samples"


def test_dc_threshold_of_full_scale_and_of_noise():
    # 2 % of 8191 counts is 163.82; with the floor at 60 dB the noise does not decide
    assert DC_WARN_FULL_SCALE_FRACTION * FULL_SCALE == pytest.approx(163.82)
    w = frontend_warnings(records(dc_offset_counts=[164.0, 163.0, 0, 0], noise_floor_db=60.0), FULL_SCALE)
    assert causes(w) == [(0, "dc_offset")]
    assert w[0].short == "rx 0 DC 2.0 % FS" and w[0].text.startswith("rx 0: DC offset of 164 counts (2.0 % of full "
                                                                     "scale")
    # 20 dB over a floor of 18 dB: |mean|^2 = 10^3.8, |mean| = 79.43 counts (1 % of full scale)
    assert 10 ** ((18.0 + DC_WARN_OVER_NOISE_DB) / 20) == pytest.approx(79.43, abs=0.01)
    w = frontend_warnings(records(dc_offset_counts=[0, 80.0, 79.0, 0]), FULL_SCALE)
    assert causes(w) == [(1, "dc_offset")] and ", 20 dB over the noise)" in w[0].text


def test_image_rejection_threshold():
    assert IMAGE_REJECTION_WARN_DB == 25.0
    w = frontend_warnings(records(image_rejection_db=[24.9, 25.0, np.nan, 60.0]), FULL_SCALE)
    assert causes(w) == [(0, "image_rejection")]
    assert w[0].short == "rx 0 IRR 25 dB" and w[0].text.startswith("rx 0: image rejection 24.9 dB (I/Q gain or "
                                                                   "phase imbalance")


def test_a_channel_whose_floor_stands_out():
    assert NOISE_FLOOR_WARN_DB == 6.0
    # the median of [18, 18, 18, 24] is 18: rx 3 stands 6 dB above it
    w = frontend_warnings(records(noise_floor_db=[18.0, 18.0, 18.0, 24.0]), FULL_SCALE)
    assert causes(w) == [(3, "noise_floor_high")] and w[0].value == pytest.approx(6.0)
    assert w[0].short == "rx 3 floor +6 dB"
    assert not frontend_warnings(records(noise_floor_db=[18.0, 18.0, 18.0, 23.9]), FULL_SCALE)
    w = frontend_warnings(records(noise_floor_db=[18.0, 5.0, 18.5, 17.5]), FULL_SCALE)  # median 17.75
    assert causes(w) == [(1, "noise_floor_low")] and w[0].value == pytest.approx(5.0 - 17.75)
    assert w[0].text == ("rx 1: noise floor 12.8 dB below the channels' median (a dead, disconnected or unpowered "
                         "channel)")
    # a channel with no noise at all; the other three keep their median
    w = frontend_warnings(records(noise_floor_db=[18.0, 18.0, -np.inf, 18.0]), FULL_SCALE)
    assert causes(w) == [(2, "no_signal")] and w[0].short == "rx 2 no signal"
    # two channels with a floor: no median to compare with
    two = records(noise_floor_db=[18.0, 40.0, np.nan, np.nan])
    assert not frontend_warnings(two, FULL_SCALE)


def test_summary_over_frames_and_health():
    frames = [records(clipped_samples=[0, 0, c, 0], interference_bursts=[b, 0, 0, 0],
                      interference_samples=[s, 0, 0, 0], noise_floor_db=[f, 18.0, 18.0, 18.0],
                      dc_offset_counts=[d, 0.5, 0.5, 0.5], image_rejection_db=[i, 50.0, 50.0, 50.0])
              for c, b, s, f, d, i in ((0, 0, 0, 18.0, 1.0, 40.0), (160, 4, 60, 19.0, 3.0, 30.0),
                                       (40, 1, 10, np.nan, np.nan, 45.0))]
    summary = FrontendSummary(4)
    assert summary.health() is None
    for r in frames:
        summary.add(r, frontend_warnings(r, FULL_SCALE))
    h = summary.health()
    assert h["frames"] == 3
    # frame 1: rx 2 clipping (1.3 %) and rx 0 interference (0.49 %); frame 2: clipping 0.33 %; frame 0: none
    assert h["frames_with_warnings"] == 2 and h["warnings"] == {"clipping": 2, "interference": 1}
    c = h["channels"]
    assert c["clipped_percent_max"][2] == pytest.approx(100 * 160 / 12288)
    assert c["clipped_percent_mean"][2] == pytest.approx(100 * (0 + 160 + 40) / 12288 / 3)
    assert c["interference_bursts_max"][0] == 4 and c["interference_bursts_total"][0] == 5
    assert c["interference_share_percent_max"][0] == pytest.approx(100 * 60 / 12288)
    assert c["interference_share_percent_mean"][0] == pytest.approx(100 * 70 / 12288 / 3)
    assert c["noise_floor_db_mean"][0] == pytest.approx(18.5) and c["noise_floor_db_max"][0] == pytest.approx(19.0)
    assert c["dc_offset_counts_max"][0] == pytest.approx(3.0) and c["image_rejection_db_min"][0] == pytest.approx(30.0)
    assert c["clipped_percent_max"][1] == 0.0 and c["noise_floor_db_mean"][1] == pytest.approx(18.0)
    # it travels in health and is validated there as any field
    base = {"uptime_s": 1.0, "frames_received": 3, "frames_processed": 3, "frames_dropped": 0, "frames_rejected": 0,
            "rejected": {}, "sequence_gaps": 0, "source_restarts": 0, "latency_p50_ms": 1.0, "latency_p99_ms": 2.0,
            "queue_depth": 0, "cpu_share": 0.1, "points_last": 0, "fps": 10.0}
    got = decode(encode_health("yard-a", base | {"frontend": h})).header["frontend"]
    assert got == h
    with pytest.raises(WireError, match="'frontend.channels.clipped_percent_max' = "):
        encode_health("yard-a", base | {"frontend": h | {"channels": c | {"clipped_percent_max": ["a"] * 4}}})
    with pytest.raises(WireError, match="'frontend.warnings' = {'gremlins': 1}: must map causes"):
        encode_health("yard-a", base | {"frontend": h | {"warnings": {"gremlins": 1}}})


# ---- a capture with clipping: serve, process ---------------------------------------------------------

@pytest.fixture(scope="module")
def clipped(tmp_path_factory):
    """The first frames of the yard capture with CLIP_N samples of rx CLIP_RX driven to full scale
    (signs alternating over I and Q, so neither the mean nor the I/Q balance moves); the clipped
    samples of each frame and channel counted with numpy."""
    path = tmp_path_factory.mktemp("monitors") / "clipped.cap"
    counts, payloads = [], []
    with CaptureReader(YARD) as r:
        sensor = capture_sensor(r)
        assert sensor.adc.full_scale == FULL_SCALE
        with CaptureWriter(path, r.sensor_toml) as w:
            for k in range(N_FRAMES):
                rec = r.read(k)
                frame = np.array(rec.payload)  # int16 [chirp, rx, sample, 2]
                flat = frame[:, CLIP_RX].reshape(-1, 2)
                signs = np.array([[1, 1], [-1, -1], [1, -1], [-1, 1]], np.int16)
                idx = np.arange(CLIP_N) * 37 % flat.shape[0]  # spread over the frame's chirps
                flat[idx] = signs[np.arange(CLIP_N) % 4] * int(FULL_SCALE)
                frame[:, CLIP_RX] = flat.reshape(frame[:, CLIP_RX].shape)
                w.write(frame, rec.sequence, rec.timestamp_s)
                payloads.append(frame)
                iq = np.abs(frame.astype(np.int32))
                counts.append(np.count_nonzero((iq >= FULL_SCALE).any(axis=-1), axis=(0, 2)))
    assert all(c[CLIP_RX] == CLIP_N and c.sum() == CLIP_N for c in counts)
    return path, sensor, payloads, counts


def _reference_frontend(sensor, payloads) -> list[np.ndarray]:
    pipe = Pipeline(sensor)
    out = []
    for frame in payloads:
        pipe.process_raw(frame)
        out.append(pipe.frontend.copy())
    return out


@pytest.mark.parametrize("workers", [0, 2])
def test_serve_publishes_the_monitor_of_every_frame(clipped, workers, tmp_path):
    """serve alone and with two workers; `record --frontend-out` listens too (alone, with --frames 2, it stops
    by itself after two frames of monitors)."""
    path, sensor, payloads, counts = clipped
    reference = _reference_frontend(sensor, payloads)
    src = ReplaySource(path, "tcp://127.0.0.1:*", speed=None, wait_s=30)
    ep = src.bind()
    svc = Service(sensor, ep, "tcp://127.0.0.1:*", workers=workers, queue_depth=64, log_interval_s=60.0)
    with log_records("cubecast.daemon.service", logging.WARNING) as logged:
        t, stop, errors = run_in_thread(svc)
        col = rec = None
        rec_stop = threading.Event()
        try:
            assert wait_until(lambda: svc.ready.is_set() or errors, 240) and not errors, errors
            col = Collector(svc.pub_endpoint)
            connected(col)
            # with workers it records until stopped; alone, --frames stops it by itself (frames of monitors)
            rec_frames = 0 if workers else 2
            rec = Recorder([svc.pub_endpoint], frontend_out=tmp_path / "fe.csv", frames=rec_frames)
            rec_thread = threading.Thread(target=rec.run, args=(rec_stop,), daemon=True)
            rec_thread.start()
            assert rec.sensor_known.wait(10)  # serve's description reached it: it is subscribed
            assert src.run() == N_FRAMES

            def health_frames(c):
                return sum(h.header["frontend"]["frames"] for h in c.of("health") if h.header.get("frontend"))
            assert col.wait_for(lambda c: len(c.of("frontend")) >= N_FRAMES and health_frames(c) >= N_FRAMES, 15)
            fronts, points = col.of("frontend"), col.of("points")
            assert [m.seq for m in fronts] == [m.seq for m in points] == list(range(N_FRAMES))
            for m, p, ref, count in zip(fronts, points, reference, counts):
                assert (m.header["run"], m.timestamp_s) == (p.run, p.timestamp_s)
                assert m.data.tobytes() == ref.tobytes()  # the chain's records, unchanged on the way
                np.testing.assert_array_equal(m.data["clipped_samples"], count)  # numpy's count of the frame
                assert m.data["samples"].tolist() == [SAMPLES_PER_FRAME] * 4
                clip = [w for w in m.header["warnings"] if w["cause"] == "clipping"]
                assert [w["rx"] for w in clip] == [CLIP_RX]
                assert clip[0]["value"] == pytest.approx(100 * CLIP_N / SAMPLES_PER_FRAME)
                assert clip[0]["short"] == "rx 2 clipping 1.6 %"  # 200 / 12288 = 1.63 %
                assert all(w["rx"] == CLIP_RX for w in m.header["warnings"])
            summaries = [h.header["frontend"] for h in col.of("health") if h.header.get("frontend")]
            assert sum(s["warnings"].get("clipping", 0) for s in summaries) == N_FRAMES
            assert sum(s["frames_with_warnings"] for s in summaries) == N_FRAMES
            assert max(s["channels"]["clipped_percent_max"][CLIP_RX] for s in summaries) == pytest.approx(
                100 * CLIP_N / SAMPLES_PER_FRAME)
            assert all(s["channels"]["clipped_percent_max"][rx] == 0.0 for s in summaries for rx in (0, 1, 3))
            if rec is not None:
                n_rec = rec_frames or N_FRAMES
                if rec_frames:
                    rec_thread.join(10)  # stops by itself after rec_frames frames of monitors
                    assert not rec_thread.is_alive()
                else:
                    assert wait_until(lambda: rec.frontend is not None and rec.frontend.summary.frames >= N_FRAMES,
                                      10)
                    rec_stop.set()
                    rec_thread.join(5)
                    assert not rec_thread.is_alive()
                assert rec.frontend.summary.frames == n_rec
                with open(tmp_path / "fe.csv", newline="") as f:
                    rows = list(csv.DictReader(f))
                assert [(int(r["frame"]), int(r["rx"])) for r in rows] == [(k, rx) for k in range(n_rec)
                                                                           for rx in range(4)]
                assert [int(r["clipped_samples"]) for r in rows] == [int(c) for count in counts[:n_rec]
                                                                     for c in count]
        finally:
            rec_stop.set()
            if col is not None:
                col.close()
            stop.set()
            t.join(10)
        assert not t.is_alive() and not errors, errors
    # one line per channel and cause per log interval (60 s here): the first frame's; at the stop one more
    # line counts the N_FRAMES - 1 held back (logs.RateLimitFilter)
    clip = [r for r in logged if "rx 2: 1.6 % of samples clipped" in r.getMessage()]
    first = [r.getMessage() for r in clip if not getattr(r, "summary", False)]
    assert first == ["cubecast serve: front end: frame 0: rx 2: 1.6 % of samples clipped (a strong near reflector, "
                     "or too much receiver gain)"]
    held = [r.getMessage() for r in clip if getattr(r, "summary", False)]
    assert len(held) == 1 and held[0].startswith(f"cubecast serve: front end: rx 2 clipping: {N_FRAMES - 1} more")


def test_process_summary_and_frontend_csv(clipped, tmp_path):
    path, sensor, payloads, counts = clipped
    fe_csv = tmp_path / "frontend.csv"
    with log_records("cubecast.daemon.process") as logged:
        assert process_capture(path, tmp_path / "points.csv", frontend_out=fe_csv, progress=False) == 0
    with open(fe_csv, newline="") as f:
        rows = list(csv.reader(f))
    assert tuple(rows[0]) == CSV_COLUMNS
    assert len(rows) - 1 == N_FRAMES * 4
    reference = _reference_frontend(sensor, payloads)
    for k, row in enumerate(rows[1:]):
        frame, rx = divmod(k, 4)
        d = dict(zip(CSV_COLUMNS, row))
        assert (int(d["frame"]), int(d["rx"])) == (frame, rx)
        assert int(d["clipped_samples"]) == counts[frame][rx]
        assert float(d["noise_floor_db"]) == pytest.approx(float(reference[frame][rx]["noise_floor_db"]), rel=1e-5)
        assert ("clipping" in d["warnings"].split(";")) == (rx == CLIP_RX)
    text = [r.getMessage() for r in logged]
    pct = 100 * CLIP_N / SAMPLES_PER_FRAME
    line = next(t for t in text if t.startswith("front end rx 2:"))
    assert line.startswith(f"front end rx 2: {N_FRAMES} frames, clipped max {pct:.3g} % mean {pct:.3g} %")
    assert next(t for t in text if t.startswith("front end rx 0:")).startswith(
        f"front end rx 0: {N_FRAMES} frames, clipped max 0 % mean 0 %")
    last = next(r for r in logged if r.getMessage().startswith("front end: ") and "frames with warnings" in
                r.getMessage())
    assert last.levelno == logging.WARNING
    assert last.getMessage().startswith(f"front end: {N_FRAMES} of {N_FRAMES} frames with warnings (clipping "
                                        f"{N_FRAMES}")


# ---- the viewer: flag, panel, key m, drawn offscreen ----------------------------------------------------

def _frontend_parts(rec: np.ndarray, seq: int = 5):
    return encode_frontend("s", seq, "run-1", 0.5, rec, FULL_SCALE,
                           [w.as_map() for w in frontend_warnings(rec, FULL_SCALE)])


def test_viewer_flag_and_panel_text():
    from cubecast.viewer import views as V
    from cubecast.viewer.feed import decode_parts
    from cubecast.viewer.frontendpanel import COLUMNS, flag_text, panel_text
    from tests.viewer_messages import cloud, points_parts, sensor_parts

    rec = records(clipped_samples=[0, 0, 160, 0], interference_bursts=[0, 3, 0, 0], interference_samples=[0, 40, 0, 0],
                  image_rejection_db=[50.0, 49.0, 47.5, 20.25], noise_floor_db=[18.0, 18.25, 18.0, np.nan])
    msg = decode_parts(_frontend_parts(rec), 0.0)
    assert flag_text(msg) == "rx 1 interference 0.33 % (+2 more)"  # 40 / 12288 = 0.326 %
    pt = panel_text(msg)
    assert pt.title == "FRONT END · frame 5 · 3 warnings"
    assert pt.rows[0] == list(COLUMNS)
    # clipped 160 / 12288 = 1.302 %, share 40 / 12288 = 0.3255 %
    assert pt.rows[1:] == [["rx 0", "0", "0", "0", "18.0", "0", "50.0"],
                           ["rx 1", "0", "3", "0.33", "18.2", "0", "49.0"],
                           ["rx 2", "1.3", "0", "0", "18.0", "0", "47.5"],
                           ["rx 3", "0", "0", "0", "–", "0", "20.2"]]
    assert [k for k, row in enumerate(pt.warn[1:]) if row[0]] == [1, 2, 3]
    assert pt.warn[2] == [True, False, True, True, False, False, False]    # rx 1: bursts and share
    assert pt.warn[3] == [True, True, False, False, False, False, False]   # rx 2: clipped
    assert pt.warn[4] == [True] + [False] * 5 + [True]                     # rx 3: IRR
    assert pt.notes[0].startswith("rx 1: interference from another radar")
    assert panel_text(None).title.startswith("FRONT END · no monitor yet")
    # the status line ends with the flag and turns to the warning level
    st = V.ViewerState(endpoint="tcp://127.0.0.1:5602")
    for parts in (sensor_parts("s"), points_parts("s", 5, cloud({"x_m": 1.0, "y_m": 6.0}))):
        st.ingest(decode_parts(parts, 0.0))
    assert V.status_line(st)[1] == "ok"
    assert st.ingest(msg)
    text, level = V.status_line(st)
    assert level == "warn" and text.endswith("rx 1 interference 0.33 % (+2 more)")
    st.ingest(decode_parts(_frontend_parts(records()), 0.0))
    assert V.status_line(st)[1] == "ok" and "interference" not in V.status_line(st)[0]


@pytest.fixture(scope="module")
def canvas():
    from cubecast.viewer.snapshot import OffscreenUnavailable, offscreen_backend
    try:
        offscreen_backend()
    except OffscreenUnavailable as exc:
        pytest.fail(f"no offscreen GL context: {exc}")
    from cubecast.viewer.canvas import ViewerCanvas
    vc = ViewerCanvas(size=(1280, 800), show=False, dpi=96)
    yield vc
    vc.canvas.close()


def _warm(img) -> np.ndarray:
    """Pixels of the warning colour (a salmon red), antialiased glyph edges included."""
    rgb = img.astype(int)
    return (rgb[..., 0] > 120) & (rgb[..., 0] - rgb[..., 2] > 60) & (rgb[..., 0] - rgb[..., 1] > 40)


def _plain(img) -> np.ndarray:
    """Pixels of the plain text colour (a light grey)."""
    rgb = img.astype(int)
    return (rgb.min(axis=-1) > 120) & (rgb.max(axis=-1) - rgb.min(axis=-1) < 40)


def test_key_m_draws_the_panel_with_the_warned_cells(canvas):
    from cubecast.viewer.app import ViewerApp
    from tests.test_viewer_render import FakeFeed
    from tests.viewer_messages import cloud, points_parts, sensor_parts

    feed = FakeFeed()
    app = ViewerApp(feed, canvas=canvas, show=False)
    feed.put(sensor_parts("s"))
    feed.put(points_parts("s", 5, cloud({"x_m": 1.0, "y_m": 6.0})))
    feed.put(_frontend_parts(records(clipped_samples=[0, 0, 160, 0])))
    app.tick()
    assert app.state.frontend_msg["header"]["seq"] == 5 and not canvas.frontend_box.visible
    off = canvas.render()[..., :3]
    app.handle_key("m", "m")
    assert app.state.show_frontend and canvas.frontend_box.visible
    on = canvas.render()[..., :3]
    left, top, w, h = canvas.frontend_box.rect
    x0, y0, x1, _ = canvas.panel_rect("rd")
    assert x0 < left and left + w < x1 and y0 < top  # in the range-Doppler panel's upper right
    box = (slice(int(top) + 2, int(top + h) - 2), slice(int(left) + 2, int(left + w) - 2))
    # the box is drawn over the map: its inside is the box's dark fill
    assert np.median(on[box].reshape(-1, 3), axis=0).max() < 40
    # rx 2's row: its name and its clipped % in the warning colour, the other rows' text in the plain colour
    from cubecast.viewer.frontendbox import COLUMNS_PX, ROW_PX
    row_y = int(top + 34 + ROW_PX * 3)   # header row 0, rx 0..2 -> row 3
    band = on[row_y - 6: row_y + 6, int(left): int(left + COLUMNS_PX[1]) + 2]
    assert _warm(band).sum() > 20 and _plain(band).sum() < 5
    other = on[int(top + 34 + ROW_PX) - 6: int(top + 34 + ROW_PX) + 6, int(left): int(left + COLUMNS_PX[1]) + 2]
    assert _warm(other).sum() == 0 and _plain(other).sum() > 20
    # the border is in the warning colour; off, none of it is there
    def edge(rows):  # the best-covered pixel row near an edge (the box's edges fall between pixels)
        return max(_warm(on[r, int(left) + 2:int(left + w) - 2]).mean() for r in rows)
    assert edge(range(int(top) - 1, int(top) + 2)) > 0.9 and edge(range(int(top + h) - 2, int(top + h) + 2)) > 0.9
    assert _warm(off[box]).sum() == 0
    app.handle_key("m", "m")
    assert not canvas.frontend_box.visible and not app.state.show_frontend


def test_view_capture_sends_the_monitor(clipped):
    from cubecast.daemon.viewsource import capture_messages
    path, sensor, payloads, counts = clipped
    msgs = capture_messages(str(path), frame=3, history=2)
    fe = [m for m in msgs if m["kind"] == "frontend"]
    assert len(fe) == 1 and fe[0]["header"]["seq"] == 3
    np.testing.assert_array_equal(fe[0]["data"]["clipped_samples"], counts[3])
    assert [w["cause"] for w in fe[0]["header"]["warnings"] if w["rx"] == CLIP_RX][0] == "clipping"
    health = next(m for m in msgs if m["kind"] == "health")
    assert health["header"]["frontend"]["frames"] == 4 and health["header"]["frontend"]["warnings"]["clipping"] == 4


def test_pointstream_keeps_the_latest_monitor():
    from cubecast.daemon.pointstream import PointStream
    from tests.test_pointstream import bound_xpub, wait_subscriptions
    rec = records(clipped_samples=[0, 0, 160, 0])
    with bound_xpub() as (pub, ep), PointStream(ep, sensor_id="yard-a", frontend=True, timeout_s=5.0) as stream:
        topics = wait_subscriptions(pub, 4)  # points, sensor, health and frontend of that sensor
        assert b"yard-a/frontend" in topics
        pub.send_multipart(encode_frontend("yard-a", 9, "r", 0.9, rec, FULL_SCALE,
                                           [w.as_map() for w in frontend_warnings(rec, FULL_SCALE)]))
        kind, sensor_id, msg = stream.next_message(timeout_s=5.0)
        assert (kind, sensor_id, msg.seq) == ("frontend", "yard-a", 9)
        assert stream.frontends["yard-a"] is msg and msg.data["clipped_samples"].tolist() == [0, 0, 160, 0]
        assert msg.header["warnings"][0]["short"] == "rx 2 clipping 1.3 %"


def test_process_warns_of_the_bundled_interferer(tmp_path):
    """The bundled interfered capture (SIM's yard with the dock's sensor): its ground truth lists the
    interference bursts per chirp and channel; every frame's share on every channel is over the 0.1 %
    threshold, so every frame and channel must warn of interference, and nothing else may."""
    cap = SAMPLES / "yard_interfered.cap"
    with CaptureReader(cap) as r:
        truth = r.ground_truth["interference"]["frames"]
    share = [[sum(b[3] - b[2] + 1 for b in bursts if b[1] == rx) / SAMPLES_PER_FRAME for rx in range(4)]
             for bursts in truth]
    assert min(min(s) for s in share) >= INTERFERENCE_WARN_SHARE
    fe_csv = tmp_path / "fe.csv"
    with log_records("cubecast.daemon.process") as logged:
        assert process_capture(cap, tmp_path / "p.npz", frontend_out=fe_csv, progress=False) == 0
    with open(fe_csv, newline="") as f:
        rows = list(csv.DictReader(f))
    assert [(int(r["frame"]), int(r["rx"])) for r in rows] == [(k, rx) for k in range(len(truth)) for rx in range(4)]
    assert all(r["warnings"] == "interference" for r in rows)
    assert all(int(r["interference_bursts"]) > 0 for r in rows)
    assert logged[-2].getMessage() == f"front end: {len(truth)} of {len(truth)} frames with warnings (interference " \
                                      f"{len(truth)})"


def test_the_noise_floor_median_equals_numpys_median():
    # The front end's median of the sampled cells' power (a histogram of the float32 bit patterns,
    # then a sort of the middle bins only) against numpy.median, the reference: exactly equal on
    # exponential power (the distribution of |X|^2 in complex Gaussian noise, common practice) over
    # 60 decades of scale, with ties, zeros, an infinity and NaN (either sign), odd and even counts.
    from cubecast.daemon.chain.frontend import MEDIAN_SHIFT, median_nonnegative

    rng = np.random.default_rng(5)
    hist = np.zeros((1 << 31) >> MEDIAN_SHIFT, np.int32)
    tmp = np.zeros(3000, np.float32)
    for t in range(600):
        n = int(rng.integers(1, 3000))
        x = (rng.exponential(size=n) * 10.0 ** rng.uniform(-30, 30)).astype(np.float32)
        kind = t % 6
        if kind == 1:
            x[: n // 3] = 0.0
        elif kind == 2:
            x = (np.round(x / x.max() * 3) * x.max() / 3).astype(np.float32)
        elif kind == 3:
            x[:] = x[0]
        elif kind == 4:
            x[rng.integers(0, n)] = np.inf
        elif kind == 5 and t % 12 == 5:
            x[rng.integers(0, n)] = np.float32(np.nan) * (-1.0 if t % 24 == 5 else 1.0)
        got, want = median_nonnegative(x, hist, tmp), np.median(x)
        assert (np.isnan(got) and np.isnan(want)) or got == want, (t, n, kind, got, want)
