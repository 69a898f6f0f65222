"""`cubecast info` (daemon/info.py): what a capture holds, checked against what the test itself wrote.

References outside the code under test: the frames, sequences, timestamps and damage each test wrote
(record boundaries found by walking the documented layout, tests/test_capture.py's record_offsets);
the bundled captures' regeneration commands in DEVELOPERS.md (20 and 16 frames, sequences from 0);
the scene files beside them (target names, read here with tomllib); the textbook FMCW relations
(Richards, Fundamentals of Radar Signal Processing, 2005) for the figures of the embedded sensor.
"""

from __future__ import annotations

import json
import math
import struct
import tomllib

import numpy as np
import pytest

from cubecast.daemon.capture import RECORD_HEADER_SIZE, CaptureWriter
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import simulate_capture
from cubecast.daemon.info import capture_info, format_info
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sensor import SPEED_OF_LIGHT_MPS, parse_sensor

from .helpers import SAMPLES, sensor_text
from .test_capture import SENSOR_TOML, record_offsets
from .test_cli import one_error_line, run_cli, run_with_closed_stdout

SMALL = sensor_text(loops=4, samples=32, n_rx=2, n_tx_az=1, elevation_tx=False)  # int16 I/Q (4, 2, 32, 2)
SMALL_SHAPE = (4, 2, 32, 2)
PAYLOAD_BYTES = math.prod(SMALL_SHAPE) * 2  # int16
NOMINAL_PERIOD_S = 0.1  # sensor_text's frame_period_s


def independent_walk(path) -> tuple[int, list[tuple[int, float]]]:
    """(file header bytes, [(sequence, timestamp_s)] per record) read with struct from the documented
    layout (README "File header", "Frame record": sequence u64 at 4, timestamp f64 at 12)."""
    data = open(path, "rb").read()
    (json_len,) = struct.unpack_from("<I", data, 10)
    out = [struct.unpack_from("<Qd", data, off + 4) for off in record_offsets(path)]
    return 14 + json_len + 4, out


# ---- the bundled captures -----------------------------------------------------------------------

@pytest.mark.parametrize("name, frames", [("yard", 20), ("gate", 16)])  # DEVELOPERS.md: --frames 20 / 16
def test_bundled_capture(name, frames):
    path = SAMPLES / f"{name}.cap"
    d = capture_info(path)
    header_bytes, records = independent_walk(path)
    assert len(records) == frames
    assert d["frames"] == d["frames_distinct"] == d["frames_usable"] == frames
    assert d["frames_repeated"] == d["frames_corrupt_payload"] == 0
    assert (d["first_sequence"], d["last_sequence"]) == (0, frames - 1)  # simulate numbers frames from 0
    assert d["gaps"] == {"gaps": 0, "frames_missing": 0, "largest": None}
    assert not any(d["reader_counts"].values()) and d["problems"] == []
    # timing from the timestamps read above, independently of the reader
    ts = np.array([t for _, t in records])
    assert d["timing"]["time_span_s"] == pytest.approx(ts[-1] - ts[0], rel=1e-12)
    assert d["timing"]["frame_rate_hz"] == pytest.approx((frames - 1) / (ts[-1] - ts[0]), rel=1e-12)
    assert d["timing"]["median_interval_s"] == pytest.approx(float(np.median(np.diff(ts))), rel=1e-12)
    # the bundled sensor's frame_period_s (replay_samples/yard_sensor.toml), read as plain TOML
    period = tomllib.loads((SAMPLES / "yard_sensor.toml").read_text())["frame"]["frame_period_s"]
    assert d["timing"]["nominal_frame_period_s"] == period
    assert d["timing"]["frame_rate_hz"] == pytest.approx(1.0 / period, rel=1e-9)
    # ground truth: one row per target of the scene file, one truth frame per frame written
    scene = tomllib.loads((SAMPLES / f"{name}_scene.toml").read_text())
    gt = d["ground_truth"]
    assert gt["present"] and gt["schema"] == "simulated" and gt["malformed"] is None
    assert gt["targets"] == [t["name"] for t in scene["target"]] and gt["frames"] == frames
    # sizes: the file is its header plus its records (56-byte header + int16 I/Q payload each)
    chirps, samples = 96, 128  # yard_sensor.toml: chirps_per_frame, samples_per_chirp; 4 RX
    assert d["file_size_bytes"] == path.stat().st_size
    assert d["file_header_bytes"] == header_bytes
    assert d["payload_bytes_per_frame"] == chirps * 4 * samples * 2 * 2
    assert d["bytes_per_frame"] == RECORD_HEADER_SIZE + chirps * 4 * samples * 2 * 2
    assert header_bytes + frames * d["bytes_per_frame"] == path.stat().st_size
    assert d["payload_layouts"] == [{"dtype": "int16", "shape": [chirps, 4, samples, 2], "kind": "adc",
                                     "frames": frames}]


def test_sensor_figures_are_the_textbook_ones_and_describe_s():
    d = capture_info(SAMPLES / "yard.cap")["sensor"]
    raw = tomllib.loads((SAMPLES / "yard_sensor.toml").read_text())
    ch, fr = raw["chirp"], raw["frame"]
    n_tx = len(raw["antennas"]["tx_positions_half_wavelength"])
    bandwidth = ch["slope_hz_per_s"] * ch["samples_per_chirp"] / ch["sample_rate_hz"]
    # Richards (2005): range resolution c / (2B), B the sweep in the ADC window; complex sampling:
    # R_max = fs c / (2 S); TDM (common practice): unambiguous velocity lambda / (4 N_tx T_c)
    lam = SPEED_OF_LIGHT_MPS / (ch["start_frequency_hz"] + ch["slope_hz_per_s"] * (
        ch["adc_start_delay_s"] + ch["samples_per_chirp"] / ch["sample_rate_hz"] / 2))
    assert d["range_resolution_m"] == pytest.approx(SPEED_OF_LIGHT_MPS / (2 * bandwidth), rel=1e-12)
    assert d["max_range_m"] == pytest.approx(ch["sample_rate_hz"] * SPEED_OF_LIGHT_MPS / (2 * ch["slope_hz_per_s"]),
                                             rel=1e-12)
    assert d["max_velocity_mps"] == pytest.approx(lam / (4 * n_tx * ch["chirp_period_s"]), rel=1e-9)
    assert (d["sensor_id"], d["n_tx"], d["n_rx"], d["chirps_per_frame"], d["samples_per_chirp"]) == (
        raw["sensor"]["id"], n_tx, len(raw["antennas"]["rx_positions_half_wavelength"]), fr["chirps_per_frame"],
        ch["samples_per_chirp"])
    assert d["start_frequency_hz"] == ch["start_frequency_hz"] and d["adc"]["sample_type"] == raw["adc"]["sample_type"]
    # the same numbers `cubecast describe --json` prints for the sensor file (info does not derive them again)
    described = json.loads(run_cli("describe", "--json", SAMPLES / "yard_sensor.toml").stdout)
    assert {k: described[k] for k in d if k in described} == {k: v for k, v in d.items() if k in described}


# ---- captures this test writes ------------------------------------------------------------------

def payload(rng) -> np.ndarray:
    return rng.integers(-3000, 3000, size=SMALL_SHAPE).astype(np.int16)


def test_a_clean_capture_s_frame_rate_is_one_over_the_period_written(tmp_path):
    period_s, n = 0.125, 24  # not the sensor's nominal 0.1 s: the file's own timing is measured
    rng = np.random.default_rng(5)
    p = tmp_path / "clean.cap"
    with CaptureWriter(p, SMALL, None, {"source": "test"}) as w:
        for k in range(n):
            w.write(payload(rng), 500 + k, 1000.0 + k * period_s)
    t = capture_info(p)["timing"]
    assert t["frame_rate_hz"] == pytest.approx(1.0 / period_s, rel=1e-9)
    assert t["median_interval_s"] == t["min_interval_s"] == t["max_interval_s"] == pytest.approx(period_s, rel=1e-9)
    assert t["time_span_s"] == pytest.approx((n - 1) * period_s, rel=1e-12)
    assert t["nominal_frame_period_s"] == NOMINAL_PERIOD_S
    assert t["frame_rate_over_nominal"] == pytest.approx(NOMINAL_PERIOD_S / period_s, rel=1e-9)
    assert capture_info(p)["ground_truth"] == {"present": False}


N_WRITTEN = 40
REMOVED = {7, 8, 20}  # sequences never written: two gaps (2 and 1 frames)
COPIED = 10  # written twice in a row: a repeated record
CORRUPTED = (15, 30)  # one payload byte flipped: the payload fails its CRC
DAMAGED = 25  # five bytes deleted from its payload: the reader drops the record
TRUNCATED = N_WRITTEN - 1  # the file ends in the middle of its payload


@pytest.fixture
def damaged(tmp_path):
    """A capture with every kind of loss, and the (sequence, timestamp) of each frame as written."""
    rng = np.random.default_rng(9)
    written = []  # (sequence, timestamp_s) per record, in file order
    p = tmp_path / "damaged.cap"
    with CaptureWriter(p, SMALL, None, {"source": "test"}) as w:
        for seq in (s for s in range(N_WRITTEN) if s not in REMOVED):
            ts = 2.0 + 0.1 * seq + 0.003 * math.sin(seq)  # a little jitter
            data = payload(rng)
            for _ in range(2 if seq == COPIED else 1):
                w.write(data, seq, ts)
                written.append((seq, ts))
    data = bytearray(p.read_bytes())
    offs = record_offsets(p)
    at = {seq: offs[i] for i, (seq, _) in reversed(list(enumerate(written)))}  # first record of each sequence
    for seq in CORRUPTED:
        data[at[seq] + RECORD_HEADER_SIZE + 10] ^= 0xFF
    del data[at[TRUNCATED] + RECORD_HEADER_SIZE + 20:]
    del data[at[DAMAGED] + RECORD_HEADER_SIZE + 30: at[DAMAGED] + RECORD_HEADER_SIZE + 35]
    p.write_bytes(bytes(data))
    return p, written


def test_counts_are_what_was_written_and_damaged(damaged):
    p, written = damaged
    d = capture_info(p)
    kept = [(s, t) for s, t in written if s not in (DAMAGED, TRUNCATED)]  # the records left in the file
    distinct = list(dict(kept).items())  # the copy holds no new frame
    assert d["frames"] == len(kept) == N_WRITTEN - len(REMOVED) + 1 - 2
    assert d["frames_repeated"] == 1 and d["frames_distinct"] == len(distinct)
    assert d["frames_corrupt_payload"] == len(CORRUPTED)
    assert d["frames_usable"] == len(distinct) - len(CORRUPTED)
    assert (d["first_sequence"], d["last_sequence"]) == (0, TRUNCATED - 1)
    # outside every frame: the truncated record's head (its header and 20 payload bytes) and the damaged
    # record (its header and its payload less the 5 bytes deleted)
    unindexed = RECORD_HEADER_SIZE + 20 + RECORD_HEADER_SIZE + PAYLOAD_BYTES - 5
    assert d["reader_counts"] == {
        "lost_sync": 0, "damaged": 1, "unusable": 0, "truncated_tail": 1, "repeated": 1, "sequence_backwards": 0,
        "corrupt_skipped": len(CORRUPTED), "unindexed_bytes": unindexed}
    assert len(d["problems"]) == 1 + 1 + 1 + len(CORRUPTED)
    # gaps: the sequences removed and the damaged record's; the largest is 7, 8 (after 6, before 9)
    missing = sorted(REMOVED | {DAMAGED})
    seqs = [s for s, _ in distinct]
    assert d["gaps"]["frames_missing"] == len(missing) and d["gaps"]["gaps"] == 3
    assert d["gaps"]["largest"] == {"frames_missing": 2, "after_sequence": 6, "before_sequence": 9,
                                    "before_frame_index": [s for s, _ in kept].index(9)}
    assert sorted(set(range(seqs[0], seqs[-1] + 1)) - set(seqs)) == missing
    # timing from the timestamps written, of the distinct frames left
    ts = np.array([t for _, t in distinct])
    steps = np.diff(ts)
    t = d["timing"]
    assert t["frame_rate_hz"] == pytest.approx((len(ts) - 1) / (ts[-1] - ts[0]), rel=1e-12)
    assert (t["min_interval_s"], t["max_interval_s"]) == pytest.approx((steps.min(), steps.max()), rel=1e-12)
    assert t["median_interval_s"] == pytest.approx(float(np.median(steps)), rel=1e-12)
    assert t["intervals_not_forward"] == 0
    assert d["unindexed_bytes"] == unindexed and d["file_size_bytes"] == p.stat().st_size
    assert d["bytes_per_frame"] == RECORD_HEADER_SIZE + PAYLOAD_BYTES


def test_json_and_text_agree(damaged):
    p, _ = damaged
    js = run_cli("info", "--json", p)
    tx = run_cli("info", p)
    assert js.returncode == tx.returncode == 0 and js.stderr == tx.stderr == ""
    d = json.loads(js.stdout)
    assert d == json.loads(json.dumps(capture_info(p)))  # the command prints what capture_info returns
    assert tx.stdout.strip() == format_info(d)
    text = tx.stdout
    assert f"{d['frames']} readable records (1 repeated, 2 with a corrupt payload), sequences 0 .. 38" in text
    assert f"{d['gaps']['frames_missing']} frames missing in {d['gaps']['gaps']} gaps" in text
    assert "damaged 1, truncated_tail 1, repeated 1, corrupt_skipped 2" in text
    assert f"{d['timing']['frame_rate_hz']:.4f} Hz mean (nominal 10.0000 Hz" in text
    assert f"median {d['timing']['median_interval_s'] * 1e3:.3f} ms" in text
    assert f"{d['file_size_bytes']} bytes" in text
    for line in d["problems"]:
        assert f"  - {line}" in text


def test_a_restarted_source_is_no_gap(tmp_path):
    rng = np.random.default_rng(4)
    p = tmp_path / "restart.cap"
    seqs = [0, 1, 2, 3, 0, 1, 2]  # the source restarted: sequences and its clock from 0 again
    with CaptureWriter(p, SMALL) as w:
        for s in seqs:
            w.write(payload(rng), s, 0.1 * s)
    d = capture_info(p)
    assert d["reader_counts"]["sequence_backwards"] == 1 and d["gaps"]["gaps"] == 0
    assert d["timing"]["intervals_not_forward"] == 1 and d["timing"]["min_interval_s"] == pytest.approx(-0.3)
    assert (d["first_sequence"], d["last_sequence"], d["frames"]) == (0, 2, len(seqs))


SCENE = """
[scene]
name = "two posts"

[[target]]
name = "near post"
range_m = 4.0
azimuth_deg = 10.0
snr_db = 10.0

[[target]]
name = "far post"
range_m = 9.0
azimuth_deg = -20.0
snr_db = 5.0
"""


@pytest.mark.parametrize("quantize, kind", [(True, "adc"), (False, "canonical")])
def test_simulated_capture_truth_and_payload_kind(tmp_path, quantize, kind):
    p = tmp_path / "sim.cap"
    sensor = parse_sensor(SMALL, "test")
    simulate_capture(sensor, parse_scene(SCENE, "test"), p, frames=5, seed=3, quantize=quantize)
    d = capture_info(p)
    assert d["frames"] == 5 and d["metadata"]["seed"] == 3 and d["metadata"]["source"] == "simulated"
    gt = d["ground_truth"]
    assert gt["targets"] == ["near post", "far post"] and gt["frames"] == 5 and gt["malformed"] is None
    shape = list(SMALL_SHAPE) if quantize else list(SMALL_SHAPE[:3])
    assert d["payload_layouts"] == [{"dtype": "int16" if quantize else "complex64", "shape": shape, "kind": kind,
                                     "frames": 5}]
    assert "2 targets (near post, far post) over 5 frames" in format_info(d)


def test_truth_of_another_schema_and_frames_that_fit_no_sensor_format(tmp_path):
    p = tmp_path / "other.cap"
    with CaptureWriter(p, SMALL, ground_truth=[1, 2, 3]) as w:
        w.write(np.zeros(SMALL_SHAPE, np.int16), 0, 0.0)
        w.write(np.zeros((3, 3), np.float32), 1, 0.1)
    d = capture_info(p)
    assert d["ground_truth"] == {"present": True, "schema": "unknown", "json_type": "list"}
    assert [(x["kind"], x["frames"]) for x in d["payload_layouts"]] == [("adc", 1), ("other", 1)]
    assert "fits neither the sensor's ADC format nor its canonical frame" in format_info(d)


def test_truth_with_a_frame_of_the_wrong_shape_is_reported(tmp_path):
    p = tmp_path / "bad_truth.cap"
    gt = {"columns": ["x_m", "y_m"], "targets": ["a", "b"], "frames": [[[0, 1], [2, 3]], [[0, 1]]]}
    with CaptureWriter(p, SMALL, ground_truth=gt):
        pass
    d = capture_info(p)
    assert d["frames"] == 0 and d["ground_truth"]["malformed"].startswith("truth frame 1 is not 2 rows of 2")
    assert "none (the file holds only its header)" in format_info(d)
    assert d["timing"]["frame_rate_hz"] is None and d["first_sequence"] is None


def test_an_unreadable_embedded_sensor_is_reported_and_the_frames_still_described(tmp_path):
    p = tmp_path / "nosensor.cap"
    with CaptureWriter(p, SENSOR_TOML) as w:  # not a valid sensor description
        for k in range(3):
            w.write(np.zeros((4, 2), np.int16), k, 0.2 * k)
    d = capture_info(p)
    assert d["sensor"] is None and "embedded sensor description" in d["sensor_error"] and str(p) in d["sensor_error"]
    assert d["frames"] == 3 and d["timing"]["frame_rate_hz"] == pytest.approx(5.0)
    assert d["timing"]["nominal_frame_period_s"] is None and d["payload_layouts"][0]["kind"] is None
    assert "sensor" in format_info(d) and "unreadable" in format_info(d)


# ---- files that are not captures, and the command line's edges ----------------------------------

def test_files_that_are_not_captures_get_one_line_naming_them(tmp_path):
    yard = (SAMPLES / "yard.cap").read_bytes()
    cases = {
        "text.cap": (b"[sensor]\nid = 'x'\n", "not a cubecast capture file"),
        "empty.cap": (b"", "empty file"),
        "cut_fixed.cap": (yard[:11], "file header truncated"),
        "cut_json.cap": (yard[:200], "JSON header truncated"),
    }
    for name, (content, why) in cases.items():
        (tmp_path / name).write_bytes(content)
        one_error_line(run_cli("info", tmp_path / name), "cubecast info: error:", str(tmp_path / name), why)
        with pytest.raises(CubecastError, match=why):
            capture_info(tmp_path / name)
    one_error_line(run_cli("info", tmp_path / "missing.cap"), str(tmp_path / "missing.cap"), "cannot open")
    one_error_line(run_cli("info", "--json", tmp_path), str(tmp_path), "cannot open")


@pytest.mark.parametrize("argv", [["info", "--json", SAMPLES / "yard.cap"], ["info", SAMPLES / "yard.cap"]])
def test_a_closed_stdout_ends_quietly(argv):
    # the Python documentation's recipe (signal module, "Note on SIGPIPE"): exit status 1, no traceback
    done = run_with_closed_stdout(*argv)
    assert done.returncode == 1 and done.stderr == "", done.stderr
