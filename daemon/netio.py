"""ZeroMQ and process helpers shared by serve, its workers, the sources and the demo: default
endpoints, binding and connecting with errors that name the endpoint's role, stopping on signals,
local workers that die with their serve.

Errors name the endpoint by its role ("publish endpoint tcp://...: cannot bind: ..."); the CLI owns
the flag names.
"""

from __future__ import annotations

import contextlib
import os
import signal
import sys
import threading

import zmq

from .errors import CubecastError

DEFAULT_SUB = "tcp://127.0.0.1:5601"  # where serve connects for ADC frames (sources bind it)
DEFAULT_PUB = "tcp://127.0.0.1:5602"  # where serve binds for points, rdmap, sensor and health
PARENT_PID_ENV = "CUBECAST_SERVE_PID"  # set by serve for its local workers


@contextlib.contextmanager
def stop_on_signals(stop: threading.Event):
    """Within the block, SIGINT and SIGTERM set `stop` instead of killing the process (main thread
    only; elsewhere a no-op). Previous handlers are restored on exit."""
    if threading.current_thread() is not threading.main_thread():
        yield stop
        return
    previous = {}

    def handler(signum, frame):
        stop.set()

    for sig in (signal.SIGINT, signal.SIGTERM):
        previous[sig] = signal.signal(sig, handler)
    try:
        yield stop
    finally:
        for sig, h in previous.items():
            signal.signal(sig, h)


def bind_socket(sock: zmq.Socket, endpoint: str, role: str) -> str:
    """Bind and return the actual endpoint (resolves tcp://host:* and port 0). `role` names the
    endpoint in the error ("publish endpoint")."""
    try:
        sock.bind(endpoint)
    except zmq.ZMQError as exc:
        raise CubecastError(f"{role} {endpoint}: cannot bind: {exc}") from None
    return sock.getsockopt_string(zmq.LAST_ENDPOINT)


def connect_socket(sock: zmq.Socket, endpoint: str, role: str) -> None:
    try:
        sock.connect(endpoint)
    except zmq.ZMQError as exc:
        raise CubecastError(f"{role} {endpoint}: cannot connect: {exc}") from None


def local_endpoint(endpoint: str) -> str:
    """Where a process on this host connects to reach a bound endpoint (wildcard hosts -> loopback)."""
    for wild, loop in (("tcp://0.0.0.0:", "tcp://127.0.0.1:"), ("tcp://*:", "tcp://127.0.0.1:"),
                       ("tcp://[::]:", "tcp://[::1]:")):
        if endpoint.startswith(wild):
            return loop + endpoint[len(wild):]
    return endpoint


def die_with_parent(parent_pid: str) -> bool:
    """In a local worker: ask Linux to send SIGTERM when serve dies (no orphans). False if serve is
    gone already (its pid is no longer our parent)."""
    if sys.platform.startswith("linux"):
        try:
            import ctypes
            ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG = 1
        except Exception:
            pass
    return str(os.getppid()) == parent_pid
