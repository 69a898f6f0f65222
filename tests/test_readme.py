"""README stays true: its tracker example runs against a live daemon, its commands exist."""

from __future__ import annotations

import re
import subprocess
import sys
import threading
from pathlib import Path

from cubecast.daemon.cli import build_parser
from cubecast.daemon.demo import free_port
from cubecast.daemon.sensor import load_sensor
from cubecast.daemon.sources import ReplaySource
from tests.helpers import SAMPLES, YARD_SENSOR
from tests.test_service import running_service

REPO = Path(__file__).resolve().parent.parent
README = (REPO / "README.md").read_text(encoding="utf-8")


def python_blocks(text: str) -> list[str]:
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def test_tracker_example_receives_points_from_a_live_daemon():
    block = next(b for b in python_blocks(README) if "recv_multipart" in b)
    sensor = load_sensor(YARD_SENSOR)
    src_ep = f"tcp://127.0.0.1:{free_port()}"
    source = ReplaySource(SAMPLES / "yard.cap", src_ep, speed=1.0, loop=True, frames=0)
    source.bind()
    stop = threading.Event()
    t = threading.Thread(target=source.run, args=(stop,), daemon=True)
    t.start()
    try:
        with running_service(sensor, src_ep) as svc:
            code = block.replace("tcp://127.0.0.1:5602", svc.pub_endpoint).replace("range(20)", "range(3)")
            out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=30)
            assert out.returncode == 0, out.stderr
            lines = [l for l in out.stdout.splitlines() if " ms " in l]
            assert len(lines) == 3
    finally:
        stop.set()
        t.join(5)


def test_pointstream_example_receives_points_from_a_live_daemon():
    block = next(b for b in python_blocks(README) if "PointStream(" in b)
    sensor = load_sensor(YARD_SENSOR)
    src_ep = f"tcp://127.0.0.1:{free_port()}"
    source = ReplaySource(SAMPLES / "yard.cap", src_ep, speed=1.0, loop=True, frames=0)
    source.bind()
    stop = threading.Event()
    t = threading.Thread(target=source.run, args=(stop,), daemon=True)
    t.start()
    try:
        with running_service(sensor, src_ep) as svc:
            assert "stream.clouds == 20" in block
            code = block.replace("tcp://127.0.0.1:5602", svc.pub_endpoint).replace("stream.clouds == 20",
                                                                                   "stream.clouds == 3")
            out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
            assert out.returncode == 0, out.stderr
            lines = out.stdout.splitlines()
            assert len([l for l in lines if " ms " in l and " points, " in l]) == 3, out.stdout
            # the counters line: nothing lost or refused on loopback, and the sensor's maximum range
            assert lines[-1].startswith("gaps 0 refused {} reconnects 0 | max range "), lines[-1]
            assert float(lines[-1].split("max range ")[1].split()[0]) == sensor.max_range_m
    finally:
        stop.set()
        t.join(5)


def test_readme_commands_exist_and_ci_runs_the_test_command():
    commands = set(re.findall(r"`cubecast ([a-z]+)", README)) | set(re.findall(r"^cubecast ([a-z]+)", README, re.M))
    known = set(build_parser()._subparsers._group_actions[0].choices)
    assert commands <= known, commands - known
    ci = (REPO / ".ci" / "run").read_text()
    assert "-m pytest -q" in ci and ".venv/bin/python -m pytest -q" in README
    assert "cubecast demo --seconds 10" in README.split("```sh")[1]
