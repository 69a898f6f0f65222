"""`cubecast record` shows its progress on stderr (daemon/progress.py, sources.Recorder): frames, point
clouds and points written with their rates once a second as a log line, or a tqdm bar on a terminal.
A rate is a count over the time it took (common practice); the clock of the unit tests is a fake one,
so nothing here depends on how fast the machine is."""

from __future__ import annotations

import fcntl
import io
import json
import logging
import os
import pty
import re
import select
import struct
import subprocess
import sys
import termios
import threading
from pathlib import Path

import pytest

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.progress import Progress
from cubecast.daemon.sources import Recorder, ReplaySource

from .helpers import SAMPLES, YARD_SENSOR

REPO = Path(__file__).resolve().parent.parent
YARD = SAMPLES / "yard.cap"
LINE = re.compile(r"^cubecast record: written (\d+) frames \((\d+\.\d)/s\)$")


class FakeClock:
    def __init__(self):
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


def test_a_line_a_second_with_the_rate_since_the_last_line(caplog):
    clock = FakeClock()
    logger = logging.getLogger("cubecast.test.progress")
    p = Progress("cubecast record", ("frames", "point clouds", "points"), logger=logger, clock=clock)
    with caplog.at_level(logging.INFO, logger="cubecast.test.progress"):
        for t, frames, points in ((100.5, 5, 40), (101.0, 10, 80), (101.5, 15, 120), (103.0, 30, 240),
                                  (103.9, 39, 312)):
            clock.t = t
            p.update(frames=frames, **{"point clouds": frames}, points=points)
    lines = [r.getMessage() for r in caplog.records]
    # due at 101.0 (1 s after the start: 10 frames in 1 s) and 103.0 (20 frames in the 2 s since)
    assert lines == ["cubecast record: written 10 frames (10.0/s), 10 point clouds (10.0/s), 80 points (80.0/s)",
                     "cubecast record: written 30 frames (10.0/s), 30 point clouds (10.0/s), 240 points (80.0/s)"]
    # the counts go along as fields (--log-json shows them)
    assert [(r.frames, r.point_clouds, r.points, r.progress) for r in caplog.records] == [(10, 10, 80, True),
                                                                                       (30, 30, 240, True)]


def test_a_bar_on_a_terminal():
    stream = io.StringIO()
    p = Progress("cubecast record", ("frames", "points"), logger=logging.getLogger("cubecast.test.progress"),
                 bar=True, total=20, stream=stream)
    p.update(frames=5, points=50)
    p.update(frames=20, points=200)
    p.close()
    text = stream.getvalue()
    assert "cubecast record" in text and "20/20" in text and "points=200" in text and "frame" in text


def test_the_recorder_counts_what_it_writes(tmp_path):
    both = Recorder(["tcp://127.0.0.1:5999"], tmp_path / "x.cap", tmp_path / "x.csv")
    assert list(both._counts()) == ["frames", "point clouds", "points"]
    points_only = Recorder(["tcp://127.0.0.1:5999"], None, tmp_path / "y.csv")
    assert list(points_only._counts()) == ["point clouds", "points"]


@pytest.fixture
def replaying():
    """The bundled capture replayed in a loop at recorded speed (10 frames a second) on a free loopback port."""
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=1.0, loop=True, wait_s=30)
    ep = src.bind()
    stop = threading.Event()
    t = threading.Thread(target=src.run, args=(stop,), daemon=True)
    t.start()
    yield ep
    stop.set()
    t.join(10)
    assert not t.is_alive()


def record_argv(ep: str, out: Path, *extra) -> list[str]:
    return [sys.executable, "-m", "cubecast.daemon.cli", *extra, "record", "--sub", ep, "--sensor", str(YARD_SENSOR),
            "--out", str(out)]


def test_record_logs_its_progress_once_a_second(replaying, tmp_path):
    # the recorder runs 2.5 s by its own clock, so at least two of its once-a-second lines are due
    out = tmp_path / "r.cap"
    done = subprocess.run(record_argv(replaying, out) + ["--duration", "2.5"], cwd=REPO, capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    progress = [LINE.match(ln) for ln in done.stderr.splitlines() if "written" in ln]
    assert len(progress) >= 2 and all(progress), done.stderr
    counts = [int(m.group(1)) for m in progress]
    assert counts == sorted(counts)
    with CaptureReader(out) as r:
        assert counts[-1] <= len(r)
    assert f"cubecast record: {len(r)} frames" in done.stderr  # the final summary as before
    # --log-json: the same lines as JSON objects with the counts; -q: none
    done = subprocess.run(record_argv(replaying, tmp_path / "j.cap", "--log-json") + ["--duration", "1.5"], cwd=REPO,
                          capture_output=True, text=True, timeout=60)
    docs = [json.loads(ln) for ln in done.stderr.splitlines()]
    shown = [d for d in docs if d.get("progress")]
    assert shown and all(isinstance(d["frames"], int) and "written" in d["message"] for d in shown)
    done = subprocess.run(record_argv(replaying, tmp_path / "q.cap", "-q") + ["--duration", "1.5"], cwd=REPO,
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and done.stderr == ""


def test_record_draws_a_bar_when_stderr_is_a_terminal(replaying, tmp_path):
    master, slave = pty.openpty()
    # a terminal of 24 rows and 120 columns (a new pseudo-terminal has 0 x 0, where tqdm draws nothing)
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 120, 0, 0))
    try:
        proc = subprocess.Popen(record_argv(replaying, tmp_path / "t.cap") + ["--frames", "15"], cwd=REPO,
                                stdout=subprocess.DEVNULL, stderr=slave)
        os.close(slave)
        slave = None
        chunks = []
        while True:  # read until the recorder closes the terminal (EOF shows as EIO on Linux)
            ready, _, _ = select.select([master], [], [], 60)
            assert ready, "no output within 60 s"
            try:
                data = os.read(master, 4096)
            except OSError:
                break
            if not data:
                break
            chunks.append(data)
        assert proc.wait(timeout=60) == 0
    finally:
        os.close(master)
        if slave is not None:
            os.close(slave)
    text = b"".join(chunks).decode("utf-8", "replace")
    assert "15/15" in text and "frame" in text, text
    assert not re.search(r"written \d+ frames", text)  # the bar instead of the lines
