"""`cubecast demo`: the bundled loading-yard capture replayed in a loop through the daemon.

Starts, as child processes on free loopback ports,
    cubecast replay replay_samples/yard.cap --loop --pub tcp://127.0.0.1:P1
    cubecast serve --sensor <the capture's sensor> --sub tcp://127.0.0.1:P1 --pub tcp://127.0.0.1:P2
and, when a display is available and the viewer package is installed, `cubecast view --sub ...P2`.
It prints a one-line summary per second from the daemon's health messages (its output, on stdout; the
start and stop lines are logged) and stops every child on Ctrl-C, SIGTERM or after --seconds (counted
from the daemon's first report, so start-up is excluded). The replay and the daemon log warnings only;
with --log-json they log JSON lines too.
"""

from __future__ import annotations

import importlib.util
import logging
import math
import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import TextIO

import zmq

from .capture import CaptureReader
from .errors import CubecastError
from .files import capture_sensor
from .logs import uses_json_lines
from .netio import stop_on_signals
from .wire import WireError, decode

SAMPLES_DIR = Path(__file__).resolve().parent.parent / "replay_samples"
DEFAULT_CAPTURE = SAMPLES_DIR / "yard.cap"
STARTUP_TIMEOUT_S = 120.0  # a cold numba cache compiles the chain on first start

log = logging.getLogger(__name__)


def free_port() -> int:
    """A currently free TCP port on 127.0.0.1 (the OS picks it; another program could take it before use)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def viewer_available() -> bool:
    if not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        return False
    try:
        return importlib.util.find_spec("cubecast.viewer.app") is not None
    except (ImportError, ValueError):
        return False


def _die_with_parent() -> None:
    """In the child, before exec: ask Linux to send SIGTERM when the demo dies (no orphans)."""
    try:
        import ctypes
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG = 1
    except Exception:
        pass


def _spawn(args: list[str]) -> subprocess.Popen:
    cmd = [sys.executable, "-m", "cubecast.daemon.cli"] + (["--log-json"] if uses_json_lines() else []) + args
    kw = {"preexec_fn": _die_with_parent} if sys.platform.startswith("linux") else {}
    return subprocess.Popen(cmd, stdin=subprocess.DEVNULL, **kw)


def _stop_children(children: dict[str, subprocess.Popen], timeout_s: float = 3.0) -> None:
    for p in children.values():
        if p.poll() is None:
            p.terminate()
    deadline = time.monotonic() + timeout_s
    for p in children.values():
        try:
            p.wait(max(0.1, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait()


def _ms(v) -> str:
    return "-" if v is None else f"{v:.1f} ms"


def summary_line(elapsed_s: float, health: dict) -> str:
    h = health
    return (f"demo {elapsed_s:5.1f} s | frames {h['frames_processed']} ({h['fps']:.1f} fps) | "
            f"points {h['points_last']} | latency p50 {_ms(h['latency_p50_ms'])} p99 {_ms(h['latency_p99_ms'])} | "
            f"dropped {h['frames_dropped']} rejected {h['frames_rejected']} gaps {h['sequence_gaps']} | "
            f"cpu {100 * h['cpu_share']:.0f} %")


def run_demo(capture: str | Path | None = None, seconds: float = 0.0, viewer: bool = True,
             out: TextIO | None = None, startup_timeout_s: float = STARTUP_TIMEOUT_S) -> int:
    out = out or sys.stdout
    if not (seconds >= 0 and math.isfinite(seconds)):
        raise CubecastError(f"--seconds {seconds!r}: must be a number >= 0 (0 = until Ctrl-C)")
    capture = Path(capture) if capture is not None else DEFAULT_CAPTURE
    if not capture.is_file():
        raise CubecastError(f"capture {capture} not found" + (
            " (the bundled samples sit in replay_samples/ next to daemon/; pass --capture)"
            if capture == DEFAULT_CAPTURE else ""))
    with CaptureReader(capture) as reader:
        sensor = capture_sensor(reader)
    launch_viewer = viewer and viewer_available()
    stop = threading.Event()
    children: dict[str, subprocess.Popen] = {}
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    with tempfile.TemporaryDirectory(prefix="cubecast-demo-") as tmp, stop_on_signals(stop):
        sensor_path = Path(tmp) / "sensor.toml"
        sensor_path.write_text(sensor.source_text, encoding="utf-8")
        src_ep = f"tcp://127.0.0.1:{free_port()}"
        out_ep = f"tcp://127.0.0.1:{free_port()}"
        try:
            children["replay"] = _spawn(["replay", str(capture), "--pub", src_ep, "--loop", "--quiet",
                                         "--wait-subscriber", "30"])
            children["serve"] = _spawn(["serve", "--sensor", str(sensor_path), "--sub", src_ep, "--pub", out_ep,
                                        "--quiet"])
            if launch_viewer:
                children["view"] = _spawn(["view", "--sub", out_ep])
            log.info("demo: replaying %s (sensor '%s') on %s; daemon publishes on %s; %s", capture.name,
                     sensor.sensor_id, src_ep, out_ep,
                     "viewer started" if launch_viewer else "no viewer (headless or not installed)")
            sub.setsockopt(zmq.SUBSCRIBE, f"{sensor.sensor_id}/health".encode())
            sub.connect(out_ep)
            t_launch = time.monotonic()
            t_first: float | None = None
            while not stop.is_set():
                now = time.monotonic()
                if t_first is None and now - t_launch > startup_timeout_s:
                    raise CubecastError(f"demo: the daemon sent no health report within {startup_timeout_s:g} s")
                if t_first is not None and seconds and now - t_first >= seconds:
                    break
                for name, p in children.items():
                    code = p.poll()
                    if code is not None and not stop.is_set():
                        if name == "view":
                            log.warning("demo: the viewer exited (code %s); carrying on", code)
                            children.pop(name)
                            break
                        raise CubecastError(f"demo: '{name}' exited early with code {code}")
                if not sub.poll(100, zmq.POLLIN):
                    continue
                parts = sub.recv_multipart(copy=False)
                try:
                    msg = decode(parts)
                except WireError:
                    continue
                if msg.kind != "health":
                    continue
                if t_first is None:
                    t_first = time.monotonic()
                print(summary_line(time.monotonic() - t_first, msg.header), file=out, flush=True)
        finally:
            sub.close(linger=0)
            ctx.term()
            _stop_children(children)
    log.info("demo: stopped")
    return 0
