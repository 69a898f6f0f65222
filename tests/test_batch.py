"""`cubecast batch`: a campaign of captures on a Dask distributed cluster (LocalCluster, worker processes
on 127.0.0.1), and `--compare`.

The reference for every output is outside the batch code: `cubecast process` on the same capture and
settings (process_capture, in this process), compared byte for byte. The comparison's counts are
checked against a direct comparison of the two runs' records with numpy, and its rule against points
built by hand with known shifts (the rule as README "Batch" writes it).
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import sys
from pathlib import Path

import cloudpickle
import dask
import numpy as np
import pytest
from distributed import Client, LocalCluster
from distributed.diagnostics.plugin import WorkerPlugin

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.cli import main
from cubecast.daemon.process import process_capture
from cubecast.daemon.wire import RECORD_DTYPE
from tests.helpers import SAMPLES
from tests.test_capture import flip_byte, record_offsets

YARD, GATE = SAMPLES / "yard.cap", SAMPLES / "gate.cap"
START_TIMEOUT_S = 60
FOLDER = {"pcd", "ply", "rosbag"}


@pytest.fixture(scope="module")
def cluster():
    """Two worker processes (one thread each) on 127.0.0.1; (scheduler address, client)."""
    with dask.config.set({"distributed.scheduler.allowed-failures": 3,
                          "distributed.comm.timeouts.connect": f"{START_TIMEOUT_S}s"}):
        lc = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                          dashboard_address=None, death_timeout=START_TIMEOUT_S)  # bounds each worker's start
    client = Client(lc, timeout=START_TIMEOUT_S)
    try:
        client.wait_for_workers(2, timeout=START_TIMEOUT_S)
        yield lc.scheduler_address, client
    finally:
        client.close()
        lc.close(timeout=START_TIMEOUT_S)


def out_name(capture: Path, fmt: str) -> str:
    return f"{capture.stem}_{fmt}" if fmt in FOLDER else f"{capture.stem}.{fmt}"


def reference(tmp_path: Path, capture: Path, fmt: str, settings=None, skip_corrupt=False) -> Path:
    """`cubecast process` of the capture, under the name batch gives it (rosbag names its .db3 by it)."""
    ref = tmp_path / "process" / capture.stem
    ref.mkdir(parents=True, exist_ok=True)
    out = ref / out_name(capture, fmt)
    process_capture(capture, out, fmt=fmt, settings_path=settings, progress=False, skip_corrupt=skip_corrupt)
    return out


def tree_bytes(path: Path) -> dict[str, bytes]:
    """Every file's bytes under a folder output (relative names), or the file's own."""
    if path.is_dir():
        return {p.relative_to(path).as_posix(): p.read_bytes() for p in sorted(path.rglob("*")) if p.is_file()}
    return {"": path.read_bytes()}


def batch(capsys, *argv) -> tuple[int, dict | None, str]:
    """Run `cubecast batch ... --json` in this process: (exit code, the report, standard error)."""
    capsys.readouterr()
    code = main(["-q", "batch", *map(str, argv), "--json"])
    out, err = capsys.readouterr()
    return code, (json.loads(out) if out.strip() else None), err


def rows_by_name(report: dict) -> dict[str, dict]:
    return {Path(r["capture"]).name: r for r in report["captures"]}


def csv_points(path: Path) -> int:
    return len(path.read_text().splitlines()) - 1


def test_own_local_cluster_of_two_processes_writes_what_process_writes(tmp_path, capsys):
    out = tmp_path / "run"
    code, report, err = batch(capsys, YARD, GATE, "--out", out, "--local-workers", 2, "--frames-per-task", 6)
    assert code == 0, err
    rows = rows_by_name(report)
    for cap in (YARD, GATE):
        ref = reference(tmp_path, cap, "csv")
        assert (out / ref.name).read_bytes() == ref.read_bytes()
        with CaptureReader(cap) as r:
            frames = len(r)
        assert rows[cap.name]["status"] == "done"
        assert rows[cap.name]["frames"] == frames
        assert rows[cap.name]["points"] == csv_points(ref)
        assert rows[cap.name]["tasks"] == -(-frames // 6)  # one task per range of 6 frame indexes
        record = json.loads((out / (ref.name + ".batch.json")).read_text())
        assert record["frames"] == frames and record["name"] == cap.stem
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # no temporary name left


@pytest.mark.parametrize("fmt", ["npz", "mcap", "pcd", "ply", "rosbag"])
def test_every_format_is_byte_identical_to_process(fmt, cluster, tmp_path, capsys):
    address, _ = cluster
    out = tmp_path / "run"
    code, report, err = batch(capsys, YARD, GATE, "--out", out, "--format", fmt, "--scheduler", address,
                              "--frames-per-task", 5)
    assert code == 0, err
    for cap in (YARD, GATE):
        ref = reference(tmp_path, cap, fmt)
        assert tree_bytes(out / ref.name) == tree_bytes(ref)


class KillOnce(WorkerPlugin):
    """Kills the worker process that starts executing a task whose key contains `key_part`, once
    (the marker file, created exclusively, holds the killed pid)."""

    def __init__(self, marker: str, key_part: str):
        self.marker, self.key_part = marker, key_part

    def transition(self, key, start, finish, **kwargs):
        if finish == "executing" and self.key_part in str(key):
            try:
                fd = os.open(self.marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            except FileExistsError:
                return
            os.write(fd, str(os.getpid()).encode())
            os.close(fd)
            os._exit(3)


def test_a_worker_killed_mid_batch_is_survived_with_identical_output(cluster, tmp_path, capsys):
    address, client = cluster
    before = set(client.run(os.getpid).values())
    marker = tmp_path / "killed"
    cloudpickle.register_pickle_by_value(sys.modules[__name__])  # the plugin travels by value
    try:
        # capture 0 (yard), its third range of 4 frame indexes: mid-batch
        client.register_plugin(KillOnce(str(marker), "-00000-00002"), name="kill-once")
        out = tmp_path / "run"
        code, report, err = batch(capsys, YARD, GATE, "--out", out, "--scheduler", address, "--frames-per-task", 4)
    finally:
        client.unregister_worker_plugin("kill-once")
        cloudpickle.unregister_pickle_by_value(sys.modules[__name__])
    assert code == 0, err
    killed = int(marker.read_text())
    assert killed in before
    client.wait_for_workers(2, timeout=START_TIMEOUT_S)  # the nanny restarted it
    assert killed not in set(client.run(os.getpid).values())
    for cap in (YARD, GATE):
        ref = reference(tmp_path, cap, "csv")
        assert (out / ref.name).read_bytes() == ref.read_bytes()
    assert rows_by_name(report)["yard.cap"]["tasks"] == 5  # 20 frames in ranges of 4: each range once


def campaign(tmp_path: Path) -> Path:
    """A folder: the two bundled captures, one that is not a capture, one with a corrupt payload."""
    folder = tmp_path / "campaign"
    folder.mkdir()
    shutil.copy(YARD, folder / "a_yard.cap")
    shutil.copy(GATE, folder / "b_gate.cap")
    (folder / "c_bad.cap").write_bytes(b"this is not a capture file at all" * 4)
    offs = record_offsets(YARD)
    flip_byte(YARD, offs[3] + 56 + 1000, folder / "d_flipped.cap")  # frame index 3's payload
    return folder


def test_a_corrupt_capture_is_reported_and_the_others_complete(cluster, tmp_path, capsys):
    address, _ = cluster
    folder = campaign(tmp_path)
    out = tmp_path / "run"
    code, report, err = batch(capsys, folder, "--out", out, "--scheduler", address, "--frames-per-task", 6)
    assert code == 2
    last = err.strip().splitlines()[-1]
    assert last.startswith("cubecast batch: error: 2 of 4 captures failed: ")
    assert "c_bad.cap" in last and "bad magic" in last
    assert "d_flipped.cap" in last and "frame 3" in last and "CRC-32 mismatch" in last
    rows = rows_by_name(report)
    assert [rows[n]["status"] for n in sorted(rows)] == ["done", "done", "failed", "failed"]
    for name in ("a_yard", "b_gate"):
        ref = reference(tmp_path, folder / f"{name}.cap", "csv")
        assert (out / ref.name).read_bytes() == ref.read_bytes()
    assert sorted(p.name for p in out.iterdir()) == ["a_yard.csv", "a_yard.csv.batch.json", "b_gate.csv",
                                                     "b_gate.csv.batch.json"]

    # with --skip-corrupt the damaged capture is written as `process --skip-corrupt` writes it
    code, report, err = batch(capsys, folder, "--out", out, "--scheduler", address, "--frames-per-task", 6,
                              "--skip-corrupt")
    assert code == 2 and "1 of 4 captures failed" in err
    row = rows_by_name(report)["d_flipped.cap"]
    ref = reference(tmp_path, folder / "d_flipped.cap", "csv", skip_corrupt=True)
    assert (out / "d_flipped.csv").read_bytes() == ref.read_bytes()
    with CaptureReader(YARD) as r:
        assert row["frames"] == len(r) - 1 and row["corrupt_skipped"] == 1
    assert "skipped frame index 3" in err


def test_a_rerun_does_no_work_and_a_change_is_processed_again(cluster, tmp_path, capsys):
    address, _ = cluster
    folder = tmp_path / "campaign"
    folder.mkdir()
    shutil.copy(YARD, folder / "one.cap")
    shutil.copy(GATE, folder / "two.cap")
    out = tmp_path / "run"
    code, first, err = batch(capsys, folder, "--out", out, "--scheduler", address)
    assert code == 0, err
    stamps = {p.name: (p.stat().st_mtime_ns, p.read_bytes()) for p in out.iterdir()}

    comment_only = tmp_path / "same.toml"  # the same effective settings: a comment, a default spelt out
    comment_only.write_text("# as before\n[processing]\ncfar_kind = \"os\"\n")
    code, again, err = batch(capsys, folder, "--out", out, "--scheduler", address, "--settings", comment_only)
    assert code == 0, err
    assert [r["status"] for r in again["captures"]] == ["up to date", "up to date"]
    assert again["totals"]["tasks"] == 0 and again["totals"]["frames_processed"] == 0
    assert again["totals"]["up_to_date"] == 2 and again["totals"]["done"] == 0
    assert {p.name: (p.stat().st_mtime_ns, p.read_bytes()) for p in out.iterdir()} == stamps
    assert [r["frames"] for r in again["captures"]] == [r["frames"] for r in first["captures"]]

    shutil.copy(GATE, folder / "one.cap")  # the capture changed
    other = tmp_path / "other.toml"
    other.write_text("[processing]\ncfar_pfa = 1e-4\n")
    code, changed, err = batch(capsys, folder / "one.cap", "--out", out, "--scheduler", address)
    assert code == 0, err
    assert changed["captures"][0]["status"] == "done" and changed["captures"][0]["reason"] == "capture changed"
    code, changed, err = batch(capsys, folder, "--out", out, "--scheduler", address, "--settings", other)
    assert [r["reason"] for r in changed["captures"]] == ["settings changed", "settings changed"]
    for name in ("one", "two"):
        ref = reference(tmp_path, folder / f"{name}.cap", "csv", settings=other)
        assert (out / f"{name}.csv").read_bytes() == ref.read_bytes()


def test_compare_two_cfar_settings_against_a_direct_comparison(cluster, tmp_path, capsys):
    address, _ = cluster
    looser = tmp_path / "looser.toml"
    looser.write_text("[processing]\ncfar_pfa = 1e-3\n")
    run_a, run_b = tmp_path / "a", tmp_path / "b"
    for run, extra in ((run_a, []), (run_b, ["--settings", looser])):
        code, _, err = batch(capsys, YARD, GATE, "--out", run, "--format", "npz", "--scheduler", address, *extra)
        assert code == 0, err
    capsys.readouterr()
    assert main(["batch", "--compare", str(run_a), str(run_b), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    rows = {r["name"]: r for r in result["captures"]}
    # Directly: a looser threshold keeps every detection of the stricter one (the chain refines each
    # detection on its own data), so every point of A is in B with the same bytes in the same frame;
    # B's other points are new detections.
    totals = dict.fromkeys(("points_a", "points_b", "matched", "gained", "lost"), 0)
    for cap in (YARD, GATE):
        a, b = (np.load(run / f"{cap.stem}.npz") for run in (run_a, run_b))
        rec_a = np.rec.fromarrays([a[n] for n in RECORD_DTYPE.names], dtype=RECORD_DTYPE)
        rec_b = np.rec.fromarrays([b[n] for n in RECORD_DTYPE.names], dtype=RECORD_DTYPE)
        same = len(set(row.tobytes() for row in rec_a) & set(row.tobytes() for row in rec_b))
        assert len(set(row.tobytes() for row in rec_a)) == len(rec_a)  # no two points alike
        want = {"points_a": len(rec_a), "points_b": len(rec_b), "matched": same, "gained": len(rec_b) - same,
                "lost": len(rec_a) - same}
        assert {k: rows[cap.stem][k] for k in want} == want
        assert want["gained"] > 0 and want["lost"] == 0  # the looser setting found more
        for coord in ("range_m", "velocity_mps", "azimuth_deg"):
            assert rows[cap.stem]["shift"][coord] == {"mean": 0.0, "rms": 0.0, "max_abs": 0.0}
        for k in totals:
            totals[k] += want[k]
    assert {k: result["total"][k] for k in totals} == totals
    capsys.readouterr()
    assert main(["batch", "--compare", str(run_a), str(run_b)]) == 0
    text = capsys.readouterr().out
    assert text.splitlines()[-1].split()[:6] == ["total", *map(str, (totals["points_a"], totals["points_b"],
                                                                     totals["matched"], totals["gained"],
                                                                     totals["lost"]))]


def hand_run(folder: Path, points: list[dict], figures: dict) -> None:
    """A batch output folder written by hand: one npz of the given points and its record."""
    folder.mkdir()
    rec = np.zeros(len(points), RECORD_DTYPE)
    for i, p in enumerate(points):
        for k, v in p.items():
            rec[k][i] = v
    np.savez(folder / "cap.npz", **{n: rec[n] for n in RECORD_DTYPE.names})
    (folder / "cap.npz.batch.json").write_text(json.dumps({
        "kind": "cubecast batch output", "name": "cap", "format": "npz", "capture": "cap.cap",
        "inputs": {"capture": "same"}, "sensor": figures}))


def test_compare_rule_on_points_with_known_shifts(tmp_path, capsys):
    # resolutions 0.2 m, 0.5 m/s, 10 deg: the scale floors are half of each (README "Batch")
    figures = {"range_resolution_m": 0.2, "velocity_resolution_mps": 0.5, "azimuth_resolution_deg": 10.0}
    tight = {"sigma_range_m": 1e-4, "sigma_velocity_mps": 1e-4, "sigma_azimuth_deg": 1e-3}
    loose = {"sigma_range_m": 0.2, "sigma_velocity_mps": 1e-4, "sigma_azimuth_deg": 1e-3}
    a = [dict(frame=0, range_m=5.0, velocity_mps=1.0, azimuth_deg=0.0, **tight),     # moves 0.06 m: d 0.6
         dict(frame=0, range_m=9.0, velocity_mps=-2.0, azimuth_deg=20.0, **tight),   # moves 0.24 m: d 2.4, apart
         dict(frame=1, range_m=5.0, velocity_mps=1.0, azimuth_deg=0.0, **loose),     # moves 0.5 m at sigma 0.2
         dict(frame=1, range_m=12.0, velocity_mps=0.0, azimuth_deg=-30.0, **tight)]  # gone
    b = [dict(frame=0, range_m=5.06, velocity_mps=1.0, azimuth_deg=0.0, **tight),
         dict(frame=0, range_m=9.24, velocity_mps=-2.0, azimuth_deg=20.0, **tight),
         dict(frame=0, range_m=5.02, velocity_mps=1.0, azimuth_deg=0.0, **tight),    # nearer to the first A point
         dict(frame=1, range_m=5.5, velocity_mps=1.0, azimuth_deg=0.0, **loose),
         dict(frame=2, range_m=7.0, velocity_mps=0.0, azimuth_deg=0.0, **tight)]     # a frame A has no point in
    hand_run(tmp_path / "a", a, figures)
    hand_run(tmp_path / "b", b, figures)
    capsys.readouterr()
    assert main(["batch", "--compare", str(tmp_path / "a"), str(tmp_path / "b"), "--json"]) == 0
    row = json.loads(capsys.readouterr().out)["captures"][0]
    # frame 0: A0-B2 (d = 0.02 / 0.1 = 0.2) before A0-B0 (0.6); A1-B1 at 0.24 / 0.1 = 2.4 > 2: not matched;
    # frame 1: A2-B3, 0.5 / sqrt(0.2^2 + 0.2^2) = 1.77 <= 2: matched; A3 lost; frame 2: B4 gained
    assert {k: row[k] for k in ("points_a", "points_b", "matched", "gained", "lost")} == \
        {"points_a": 4, "points_b": 5, "matched": 2, "gained": 3, "lost": 2}
    shifts = np.array([5.02 - 5.0, 5.5 - 5.0], np.float64)
    f32 = np.float32
    exact = np.array([f32(5.02) - f32(5.0), f32(5.5) - f32(5.0)], np.float64)  # stored as float32
    assert np.allclose(exact, shifts, atol=1e-6)
    assert row["shift"]["range_m"]["mean"] == pytest.approx(exact.mean(), rel=1e-12)
    assert row["shift"]["range_m"]["rms"] == pytest.approx(np.sqrt((exact ** 2).mean()), rel=1e-12)
    assert row["shift"]["range_m"]["max_abs"] == pytest.approx(exact.max(), rel=1e-12)
    assert row["shift"]["velocity_mps"]["rms"] == 0.0

    capsys.readouterr()
    assert main(["batch", "--compare", str(tmp_path / "a"), str(tmp_path / "b"), "--gate", "2.5", "--json"]) == 0
    row = json.loads(capsys.readouterr().out)["captures"][0]
    assert row["matched"] == 3 and row["lost"] == 1  # A1-B1 (2.4) inside a gate of 2.5


def test_without_the_extra_batch_names_it(tmp_path, capsys, monkeypatch):
    for name in ("dask", "distributed"):
        monkeypatch.setitem(sys.modules, name, None)  # import fails as if not installed
    code = main(["batch", str(YARD), "--out", str(tmp_path / "run")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert err[0].startswith("cubecast batch: error: cubecast batch needs dask and distributed")
    assert "pip install 'cubecast[batch]'" in err[0]
    assert not (tmp_path / "run").exists()


def test_a_folder_output_is_replaced_when_complete_and_kept_when_its_capture_fails(cluster, tmp_path, capsys):
    address, _ = cluster
    folder = tmp_path / "campaign"
    folder.mkdir()
    cap = folder / "yard.cap"
    shutil.copy(YARD, cap)
    out = tmp_path / "run"
    code, _, err = batch(capsys, folder, "--out", out, "--format", "pcd", "--scheduler", address)
    assert code == 0, err
    other = tmp_path / "other.toml"
    other.write_text("[processing]\ncfar_pfa = 1e-4\n")
    code, report, err = batch(capsys, folder, "--out", out, "--format", "pcd", "--scheduler", address,
                              "--settings", other)
    assert code == 0 and report["captures"][0]["reason"] == "settings changed", err
    assert tree_bytes(out / "yard_pcd") == tree_bytes(reference(tmp_path, cap, "pcd", settings=other))
    assert sorted(p.name for p in out.iterdir()) == ["yard_pcd", "yard_pcd.batch.json"]
    kept = tree_bytes(out / "yard_pcd"), (out / "yard_pcd.batch.json").read_bytes()

    flip_byte(YARD, record_offsets(YARD)[5] + 56 + 10, cap)  # now a corrupt frame: this capture fails
    code, report, err = batch(capsys, folder, "--out", out, "--format", "pcd", "--scheduler", address)
    assert code == 2 and report["captures"][0]["status"] == "failed"
    assert (tree_bytes(out / "yard_pcd"), (out / "yard_pcd.batch.json").read_bytes()) == kept
    assert sorted(p.name for p in out.iterdir()) == ["yard_pcd", "yard_pcd.batch.json"]


def bias_calibration(path: Path, capture: Path, range_bias_m: float, iq: bool = False) -> None:
    """A calibration file (README "Calibration file") with unit gains and a range bias, for the
    capture's sensor; with `iq`, an [[iq_imbalance]] table too (README "I/Q imbalance")."""
    from cubecast.daemon.calibfile import CALIBRATION_FORMAT, CALIBRATION_VERSION
    from cubecast.daemon.files import capture_sensor
    with CaptureReader(capture) as r:
        s = capture_sensor(r)
    lines = ["[calibration]", f'format = "{CALIBRATION_FORMAT}"', f"version = {CALIBRATION_VERSION}",
             f'sensor_id = "{s.sensor_id}"', f'sensor_digest = "{s.digest}"', f'array_digest = "{s.array_digest}"',
             f"n_tx = {s.n_tx}", f"n_rx = {s.n_rx}", f"range_bias_m = {range_bias_m}"]
    for v in range(s.n_tx * s.n_rx):
        lines += ["[[channel]]", f"index = {v}", f"tx = {v // s.n_rx}", f"rx = {v % s.n_rx}",
                  "gain_amplitude = 1.0", "gain_phase_deg = 0.0"]
    for rx in range(s.n_rx) if iq else ():
        lines += ["[[iq_imbalance]]", f"rx = {rx}", f"q_gain = {1.0 + 0.02 * rx}", f"q_phase_deg = {1.5 - rx}"]
    path.write_text("\n".join(lines) + "\n")


def test_a_calibration_is_applied_as_process_applies_it_and_compare_sees_its_range_bias(cluster, tmp_path, capsys):
    address, _ = cluster
    cal = tmp_path / "bias.toml"
    bias_calibration(cal, YARD, 0.05)
    plain, biased = tmp_path / "plain", tmp_path / "biased"
    for run, extra in ((plain, []), (biased, ["--calibration", cal])):
        code, _, err = batch(capsys, YARD, "--out", run, "--format", "npz", "--scheduler", address, *extra)
        assert code == 0, err
    ref = tmp_path / "process.npz"
    process_capture(YARD, ref, settings_path=None, calibration_path=cal, progress=False)
    assert (biased / "yard.npz").read_bytes() == ref.read_bytes()
    # a calibration with an I/Q table: applied by the workers as process applies it (and it matters)
    iq_cal, iq_run, iq_ref = tmp_path / "iq.toml", tmp_path / "iq_run", tmp_path / "process_iq.npz"
    bias_calibration(iq_cal, YARD, 0.05, iq=True)
    code, _, err = batch(capsys, YARD, "--out", iq_run, "--format", "npz", "--scheduler", address,
                         "--calibration", iq_cal)
    assert code == 0, err
    process_capture(YARD, iq_ref, settings_path=None, calibration_path=iq_cal, progress=False)
    assert (iq_run / "yard.npz").read_bytes() == iq_ref.read_bytes() != ref.read_bytes()
    capsys.readouterr()
    assert main(["batch", "--compare", str(plain), str(biased), "--json"]) == 0
    total = json.loads(capsys.readouterr().out)["total"]
    assert total["gained"] == 0 and total["lost"] == 0 and total["matched"] == total["points_a"] > 0
    # the bias is measured minus true range: subtracted from every range (README "Calibration file");
    # float32 ranges near 10 m are exact to about 1e-6 m
    assert total["shift"]["range_m"]["mean"] == pytest.approx(-0.05, abs=2e-6)
    assert total["shift"]["range_m"]["max_abs"] == pytest.approx(0.05, abs=2e-6)


class FakeClock:
    def __init__(self):
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


def test_progress_lines_give_the_totals_the_rate_and_the_time_left(caplog):
    from cubecast.daemon.batch import BatchProgress
    clock = FakeClock()
    p = BatchProgress(300, 3, clock=clock)
    with caplog.at_level(logging.INFO, logger="cubecast.daemon.batch"):
        for t, frames, captures in ((100.5, 20, 0), (101.0, 50, 0), (103.0, 150, 1), (103.5, 300, 3)):
            clock.t = t
            p.update(frames=frames, captures=captures)
    # due at 101.0 (50 frames in 1 s: 250 left at 50/s) and 103.0 (100 frames in 2 s: 150 left at 50/s)
    assert [r.getMessage() for r in caplog.records] == [
        "batch: 50 of 300 frames (50.0/s), 0 of 3 captures, 5 s left",
        "batch: 150 of 300 frames (50.0/s), 1 of 3 captures, 3 s left"]
    assert [(r.frames, r.captures) for r in caplog.records] == [(50, 0), (150, 1)]


def test_each_capture_carries_the_front_end_summary_process_gives(cluster, tmp_path, capsys, caplog):
    """The front end's monitor over each capture, in the report row, the record beside the output and the
    log, against `cubecast process --frontend-out` of the same capture (its CSV, a row per frame and
    channel): the same frames, burst totals, clipped samples and frames with warnings."""
    address, _ = cluster
    interfered = SAMPLES / "yard_interfered.cap"
    out = tmp_path / "run"
    with caplog.at_level(logging.INFO, logger="cubecast.daemon.batch"):
        code, report, err = batch(capsys, YARD, interfered, "--out", out, "--scheduler", address,
                                  "--frames-per-task", 2)
    assert code == 0, err
    rows = rows_by_name(report)
    for cap in (YARD, interfered):
        fe_csv = tmp_path / f"{cap.stem}_fe.csv"
        assert process_capture(cap, tmp_path / f"{cap.stem}.csv", frontend_out=fe_csv, progress=False) == 0
        lines = fe_csv.read_text().splitlines()
        head = lines[0].split(",")
        csv_rows = [dict(zip(head, line.split(","))) for line in lines[1:]]
        n_rx = 1 + max(int(r["rx"]) for r in csv_rows)
        frames = sorted({int(r["frame"]) for r in csv_rows})
        record = json.loads((out / f"{cap.stem}.csv.batch.json").read_text())
        for summary in (rows[cap.name]["frontend"], record["frontend"]):
            assert summary["frames"] == len(frames)
            ch = summary["channels"]
            for rx in range(n_rx):
                mine = [r for r in csv_rows if int(r["rx"]) == rx]
                assert ch["interference_bursts_total"][rx] == sum(int(r["interference_bursts"]) for r in mine)
                assert ch["interference_bursts_max"][rx] == max(int(r["interference_bursts"]) for r in mine)
            warned = {int(r["frame"]) for r in csv_rows if r["warnings"]}
            assert summary["frames_with_warnings"] == len(warned)
        if cap == interfered:
            assert sum(record["frontend"]["channels"]["interference_bursts_total"]) > 0  # the interferer is seen
    logged = [r.getMessage() for r in caplog.records if r.name == "cubecast.daemon.batch"]
    assert any(m.startswith("yard_interfered.cap: ") for m in logged)
    assert any(m.startswith("yard.cap: ") for m in logged)
