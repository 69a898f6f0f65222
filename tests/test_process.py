"""Offline processing of the bundled samples: `cubecast process` and the ground truth."""

from __future__ import annotations

import csv
import json
import math

import numpy as np
import pytest

from cubecast.daemon.capture import CaptureReader, CaptureWriter
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.cli import main
from cubecast.daemon.files import capture_sensor
from cubecast.daemon.process import process_frames
from tests.helpers import SAMPLES

CSV_COLUMNS = ["frame", "timestamp_s", "x_m", "y_m", "z_m", "range_m", "azimuth_deg", "elevation_deg",
               "velocity_mps", "snr_db", "sigma_range_m", "sigma_azimuth_deg", "sigma_elevation_deg",
               "sigma_velocity_mps", "platform_x_m", "platform_y_m", "platform_z_m", "cell_sources"]
HANN_ENBW = 1.5  # Harris, Proc. IEEE, 1978


def run_sample(name):
    with CaptureReader(SAMPLES / name) as r:
        sensor = capture_sensor(r)
        records = process_frames(r, Pipeline(sensor))
        truth = r.ground_truth
    return sensor, records, truth


@pytest.mark.parametrize("name", ["yard.cap", "gate.cap"])
def test_every_visible_target_found_in_most_frames(name):
    sensor, records, truth = run_sample(name)
    cols = truth["columns"]
    ix = {c: cols.index(c) for c in cols}
    # detectable: per-channel cell SNR (per-sample SNR + coherent gain of two Hann FFTs, Harris 1978)
    # comfortably above the CFAR threshold
    gain_db = 10 * math.log10(sensor.samples_per_chirp * sensor.n_loops / HANN_ENBW ** 2)
    for t, tname in enumerate(truth["targets"]):
        hits = considered = 0
        for f, rows in enumerate(truth["frames"]):
            row = rows[t]
            if not row[ix["in_fov"]] or row[ix["snr_db"]] + gain_db < 18.0:
                continue
            considered += 1
            pts = records[f]
            d = np.sqrt((pts["x_m"] - row[0]) ** 2 + (pts["y_m"] - row[1]) ** 2 + (pts["z_m"] - row[2]) ** 2)
            ok = (d < 0.8) & (np.abs(pts["range_m"] - row[ix["range_m"]]) < 0.3) \
                & (np.abs(pts["velocity_mps"] - row[ix["velocity_mps"]]) < 0.5)
            hits += bool(np.any(ok))
        assert considered > 0, f"{tname} never detectable: check the scene"
        assert hits >= 0.8 * considered, f"{name}: {tname} found in {hits} of {considered} frames"


def test_door_header_beam_is_overhead_not_on_the_ground():
    sensor, records, truth = run_sample("yard.cap")
    beams = [i for i, n in enumerate(truth["targets"]) if "header beam" in n]
    assert beams
    for f, rows in enumerate(truth["frames"]):
        pts = records[f]
        for b in beams:
            row = rows[b]
            near = pts[(np.abs(pts["range_m"] - row[6]) < 0.3) & (np.abs(pts["velocity_mps"]) < 0.3)
                       & (np.abs(pts["azimuth_deg"] - row[7]) < 5.0)]
            assert len(near) >= 1, f"frame {f}: beam at azimuth {row[7]:.1f} missing"
            assert np.all(near["z_m"] > 3.0), f"frame {f}: beam placed at z = {near['z_m']}"


def test_fast_van_is_unfolded():
    # The gate sample's van drives in at 11 m/s, beyond the TDM limit (~8.06 m/s): the chain unfolds it.
    sensor, records, truth = run_sample("gate.cap")
    assert sensor.max_velocity_mps < 11.0 < sensor.max_velocity_unfolded_mps
    van = truth["targets"].index("van front")
    good = 0
    for f, rows in enumerate(truth["frames"]):
        pts = records[f]
        near = pts[np.abs(pts["range_m"] - rows[van][6]) < 0.4]
        good += bool(np.any(np.abs(near["velocity_mps"] - rows[van][9]) < 0.3))
    assert good >= 0.9 * len(truth["frames"])


def test_process_cli_csv_columns_and_content(tmp_path, capsys):
    out = tmp_path / "points.csv"
    assert main(["process", str(SAMPLES / "gate.cap"), "--out", str(out), "--quiet"]) == 0
    assert capsys.readouterr() == ("", "")  # --quiet after the subcommand: no status line, no progress bar
    with open(out, newline="") as f:
        rows = list(csv.reader(f))
    assert rows[0] == CSV_COLUMNS
    sensor, records, _ = run_sample("gate.cap")
    assert len(rows) - 1 == sum(len(r) for r in records)
    first = records[0][0]
    assert float(rows[1][CSV_COLUMNS.index("range_m")]) == pytest.approx(float(first["range_m"]), rel=1e-5)
    npz = tmp_path / "points.npz"
    assert main(["--log-json", "process", str(SAMPLES / "gate.cap"), "--out", str(npz)]) == 0
    data = np.load(npz)
    assert list(data.files) == CSV_COLUMNS
    assert data["range_m"].shape[0] == len(rows) - 1
    out, err = capsys.readouterr()
    docs = [json.loads(line) for line in err.splitlines()]  # JSON lines only: no progress bar
    # the points line, then the front end's summary: a line per receive channel and the warnings line
    assert out == "" and [d["level"] for d in docs] == ["info"] * (2 + sensor.n_rx)
    assert {d["logger"] for d in docs} == {"cubecast.daemon.process"}
    assert docs[0]["message"] == f"{len(records)} frames, {len(rows) - 1} points -> {npz}"
    assert [d["message"].split(":")[0] for d in docs[1:]] == [f"front end rx {k}" for k in range(sensor.n_rx)] + [
        "front end"]


def test_process_cli_reports_corrupt_frame(tmp_path, capsys):
    bad = tmp_path / "bad.cap"
    data = bytearray((SAMPLES / "gate.cap").read_bytes())
    with CaptureReader(SAMPLES / "gate.cap") as r:
        n = len(r)
    data[len(data) - (len(data) // n) // 2] ^= 0xFF  # a byte inside the last frame's payload
    bad.write_bytes(bytes(data))
    assert main(["process", str(bad), "--out", str(tmp_path / "p.csv"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert f"frame {n - 1}" in err and "CRC" in err.upper() and err.count("\n") == 1
    assert main(["-q", "process", str(bad), "--out", str(tmp_path / "p.csv"), "--skip-corrupt"]) == 0
    out, err = capsys.readouterr()
    assert out == "" and f"frame {n - 1}" in err and "warning" in err  # warnings pass -q


def test_process_skips_a_repeated_record_and_reports_it(tmp_path, capsys):
    """A copy of an earlier record holds no new frame: the points equal those of the capture without
    the copy, and the summary says how many were skipped."""
    clean, dup = tmp_path / "clean.cap", tmp_path / "dup.cap"
    with CaptureReader(SAMPLES / "gate.cap") as r:
        frames = [r[j] for j in range(3)]
        for path, order in ((clean, [0, 1, 2]), (dup, [0, 1, 2, 1])):
            with CaptureWriter(path, r.sensor_toml, r.ground_truth, r.metadata) as w:
                for j in order:
                    w.write(frames[j].payload, frames[j].sequence, frames[j].timestamp_s)
    assert main(["-q", "process", str(clean), "--out", str(tmp_path / "clean.npz")]) == 0
    capsys.readouterr()
    assert main(["--log-json", "process", str(dup), "--out", str(tmp_path / "dup.npz")]) == 0
    docs = [json.loads(line) for line in capsys.readouterr().err.splitlines()]
    a, b = np.load(tmp_path / "clean.npz"), np.load(tmp_path / "dup.npz")
    assert a.files == b.files and all(np.array_equal(a[c], b[c]) for c in a.files)
    assert sorted(set(a["frame"])) == [f.sequence for f in frames]
    docs = [d for d in docs if not d["message"].startswith("front end")]  # the front end's summary after these
    assert [d["level"] for d in docs] == ["warning", "info"]
    assert "frame index 3" in docs[0]["message"] and "repeats frame index 1" in docs[0]["message"]
    assert docs[1]["message"].endswith("(1 repeated record skipped)")


def test_process_cli_bad_inputs(tmp_path, capsys):
    assert main(["process", str(tmp_path / "none.cap"), "--out", str(tmp_path / "p.csv")]) == 2
    assert "none.cap" in capsys.readouterr().err
    assert main(["process", str(SAMPLES / "gate.cap"), "--out", str(tmp_path / "p.txt")]) == 2
    err = capsys.readouterr().err
    assert "extension '.txt'" in err and "name a .csv, .npz, .mcap file" in err and "--format" in err
    bad = tmp_path / "s.toml"
    bad.write_text("[processing]\ncfar_kind = \"median\"\n")
    assert main(["process", str(SAMPLES / "gate.cap"), "--out", str(tmp_path / "p.csv"), "--settings", str(bad)]) == 2
    assert "cfar_kind = 'median'" in capsys.readouterr().err
