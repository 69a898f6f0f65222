"""ZeroMQ and process helpers shared by serve, its workers, the sources, the recorder and the demo:
default endpoints, binding and connecting with errors that name the endpoint's role, the rule on
endpoints reachable from other hosts (keys, or an explicit insecure), a subscriber that keeps its
sources whatever they send, counting refused handshakes, stopping on signals, local workers that die
with their serve.

Errors name the endpoint by its role ("publish endpoint tcp://...: cannot bind: ..."); the CLI owns
the flag names.
"""

from __future__ import annotations

import contextlib
import contextvars
import ipaddress
import logging
import os
import re
import signal
import sys
import threading
import time

import zmq
from zmq.utils.monitor import recv_monitor_message

from .errors import CubecastError
from .keys import HANDSHAKE_FAILED_EVENTS, ClientKeys, ServerKeys
from .logs import RateLimitFilter, log_limited

DEFAULT_SUB = "tcp://127.0.0.1:5601"  # where serve connects for ADC frames (sources bind it)
DEFAULT_PUB = "tcp://127.0.0.1:5602"  # where serve binds for points, rdmap, sensor and health
PARENT_PID_ENV = "CUBECAST_SERVE_PID"  # set by serve for its local workers

# The largest message part a subscriber takes in (ZMQ_MAXMSGSIZE): the wire's own generic bound on a
# payload (wire.DEFAULT_MAX_PAYLOAD_BYTES). Every part below it is received, measured and, if it is
# larger than the receiver accepts, rejected as 'oversized' by the wire's decoder; only a part above
# it makes ZeroMQ drop the connection, which Subscriber notices and dials again.
MAX_PART_BYTES = 256 * 1024 * 1024
REDIAL_CHECK_S = 0.5   # a connection lost and not redialled by ZeroMQ within this is dialled again by us
REDIAL_MAX_S = 4.0     # the longest wait between our redials of an endpoint that keeps failing
WARN_INTERVAL_S = 5.0

log = logging.getLogger(__name__)


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


_HOST_NAME = re.compile(r"[A-Za-z0-9](?:[A-Za-z0-9_.-]*[A-Za-z0-9])?")  # a DNS name or an interface name
_TRANSPORTS = "tcp://HOST:PORT, ipc://PATH or inproc://NAME"


def _host_problem(host: str, bind: bool) -> str | None:
    if host == "*":
        return None if bind else "host * (every interface) can only be bound; connect to an address or a name"
    if host.startswith("["):
        if not host.endswith("]"):
            return f"host {host}: an IPv6 address goes in brackets, [ADDRESS]"
        try:
            ipaddress.IPv6Address(host[1:-1].split("%", 1)[0])
        except ValueError:
            return f"host {host}: not an IPv6 address"
        return None
    if ":" in host:
        return f"host {host}: write an IPv6 address in brackets, tcp://[{host}]:PORT"
    if re.fullmatch(r"[0-9.]+", host):
        try:
            ipaddress.IPv4Address(host)
        except ValueError:
            return f"host {host}: not an IPv4 address"
        return None
    if not _HOST_NAME.fullmatch(host):
        return f"host {host!r}: not an address, a host name or an interface name"
    return None


def _port_problem(port: str, bind: bool) -> str | None:
    # ZeroMQ reads the port with its own parser and takes it modulo 65536 (99999 binds 34463), so the
    # range is checked here; * (and 0) ask the system for a free port when binding (zmq_tcp(7))
    if bind and port in ("*", "0"):
        return None
    if port == "*" or port == "0":
        return f"port {port}: a free port can only be asked for when binding; give the bound side's port"
    if not re.fullmatch(r"[0-9]{1,5}", port) or not 1 <= int(port) <= 65535:
        return f"port {port!r}: must be a number in 1..65535" + (" (or * for a free port)" if bind else "")
    return None


def endpoint_problem(endpoint: str, bind: bool) -> str | None:
    """What is wrong with a ZeroMQ endpoint given to bind (bind=True) or connect, or None: the
    transport (tcp, ipc, inproc), the host (an IPv4 address, a bracketed IPv6 address, a host or
    interface name; * only to bind) and the port (1..65535; * or 0 only to bind). ZeroMQ itself
    accepts some of these silently (a port above 65535 wraps), so they are checked before it sees them."""
    if not isinstance(endpoint, str) or endpoint != endpoint.strip():
        return f"must be {_TRANSPORTS}, without spaces"
    scheme, sep, rest = endpoint.partition("://")
    if not sep or scheme not in ("tcp", "ipc", "inproc"):
        return f"must be {_TRANSPORTS}"
    if scheme in ("ipc", "inproc"):
        if not rest:
            return f"{scheme}:// needs a {'path' if scheme == 'ipc' else 'name'}"
        if rest == "*" and scheme == "inproc":
            return "inproc://* is not a name (ipc://* binds a generated path)"
        if rest == "*" and not bind:
            return "ipc://* (a generated path) can only be bound; give the bound side's path"
        return None
    if not bind and ";" in rest:  # tcp://SOURCE;HOST:PORT: connect from a given local address
        source, rest = rest.split(";", 1)
        src_host, colon, src_port = source.rpartition(":")
        if not colon or src_host.endswith(":"):  # the source port is optional (an unbracketed IPv6 has colons)
            src_host, src_port = source, "*"
        problem = _host_problem(src_host, bind=True) or _port_problem(src_port, bind=True)
        if problem:
            return f"source address {source}: {problem}"
    host, colon, port = rest.rpartition(":")
    if not colon or not host:
        return "tcp needs tcp://HOST:PORT" + (" (HOST may be * for every interface)" if bind else "")
    return _host_problem(host, bind) or _port_problem(port, bind)


def check_endpoint(endpoint: str, role: str, bind: bool) -> str:
    """The endpoint, or CubecastError "ROLE ENDPOINT: what is wrong" (see endpoint_problem)."""
    problem = endpoint_problem(endpoint, bind)
    if problem:
        raise CubecastError(f"{role} {endpoint}: {problem}")
    return endpoint


def bind_socket(sock: zmq.Socket, endpoint: str, role: str) -> str:
    """Bind and return the actual endpoint (resolves tcp://host:* and port 0). `role` names the
    endpoint in the error ("publish endpoint")."""
    check_endpoint(endpoint, role, bind=True)
    try:
        sock.bind(endpoint)
    except zmq.ZMQError as exc:
        raise CubecastError(f"{role} {endpoint}: cannot bind: {exc}") from None
    return sock.getsockopt_string(zmq.LAST_ENDPOINT)


def connect_socket(sock: zmq.Socket, endpoint: str, role: str) -> None:
    check_endpoint(endpoint, role, bind=False)
    try:
        sock.connect(endpoint)
    except zmq.ZMQError as exc:
        raise CubecastError(f"{role} {endpoint}: cannot connect: {exc}") from None


def host_only(endpoint: str) -> bool:
    """True for an endpoint no other host can reach: tcp on a loopback address (127.0.0.0/8, ::1,
    localhost), ipc or inproc. Wildcards, interface names and every other address are reachable."""
    if endpoint.startswith(("ipc://", "inproc://")):
        return True
    m = re.fullmatch(r"tcp://(\[[^\]]*\]|[^:\]]*):[^:]*", endpoint.strip())
    if not m:
        return False
    host = m.group(1).strip("[]")
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def check_exposure(endpoint: str, role: str, *, keyed: bool, insecure: bool, exposes: str,
                   keys_hint: str = "--server-key FILE --client-keys DIR") -> None:
    """The rule for binding: an endpoint other hosts can reach needs keys, or `insecure` said out loud.
    Raises CubecastError without keys and without insecure; logs a warning saying what is exposed with
    insecure. `exposes`: what a stranger gets there ("the raw ADC frames")."""
    if keyed or host_only(endpoint):
        return
    if not insecure:
        raise CubecastError(f"{role} {endpoint}: reachable from other hosts, and no keys are given: anyone who "
                            f"reaches it would get {exposes}. Give keys ({keys_hint}, made with `cubecast keys`), "
                            "bind a loopback address, or pass --insecure to allow it")
    log.warning("%s %s: bound without keys (--insecure): anyone who can reach it gets %s, neither authenticated "
                "nor encrypted", role, endpoint, exposes, extra={"endpoint": endpoint, "insecure": True})


# the keys and the insecure flag a command gave for the publisher of a source it runs (the CLI sets
# it around the adapter, whose publisher is made inside the command)
_COMMAND_PUBLISHER: contextvars.ContextVar[dict] = contextvars.ContextVar("cubecast_publisher", default={})


@contextlib.contextmanager
def publisher_security(keys: ServerKeys | None, insecure: bool):
    token = _COMMAND_PUBLISHER.set({"keys": keys, "insecure": insecure})
    try:
        yield
    finally:
        _COMMAND_PUBLISHER.reset(token)


def command_publisher_security() -> dict:
    """keys= and insecure= for a source's publisher, as the running command asked (none, by default)."""
    return dict(_COMMAND_PUBLISHER.get())


class HandshakeCounter:
    """Counts the security handshakes a bound, keyed socket refused (unknown key, no key, a client
    holding a wrong public key for it), from a socket monitor. Poll `count()` from the socket's thread."""

    def __init__(self, sock: zmq.Socket, role: str, prefix: str):
        self.sock, self.role, self.prefix = sock, role, prefix
        self.monitor = sock.get_monitor_socket(HANDSHAKE_FAILED_EVENTS)
        self.refused = 0
        self._limit = RateLimitFilter(WARN_INTERVAL_S)

    def count(self) -> int:
        while self.monitor is not None:
            try:
                ev = recv_monitor_message(self.monitor, zmq.NOBLOCK)
            except zmq.Again:
                break
            if ev["event"] & HANDSHAKE_FAILED_EVENTS:
                self.refused += 1
                what = ("a key not in its accepted folder" if ev["event"] == zmq.EVENT_HANDSHAKE_FAILED_AUTH
                        else "no key, or a wrong public key for this side")
                log_limited(log, self._limit, logging.WARNING, "handshake refused",
                            "%s: %s: refused a connection (%s)", self.prefix, self.role, what)
        return self.refused

    def close(self) -> None:
        if self.monitor is not None:
            self._limit.flush(log, force=True, prefix=f"{self.prefix}: ")
            self.monitor = _close_monitor(self.sock, self.monitor)


def _close_monitor(sock: zmq.Socket, monitor: zmq.Socket | None) -> None:
    """Stop a socket's monitor and close its end (before the socket closes, so that its inproc address
    is free again); returns None for the caller's attribute."""
    if monitor is not None:
        try:
            sock.disable_monitor()
        except zmq.ZMQError:
            pass
        monitor.close(linger=0)
    return None


_SUB_EVENTS = (zmq.EVENT_CONNECTED | zmq.EVENT_CONNECT_DELAYED | zmq.EVENT_CONNECT_RETRIED | zmq.EVENT_DISCONNECTED
               | zmq.EVENT_HANDSHAKE_SUCCEEDED | HANDSHAKE_FAILED_EVENTS)


class Subscriber:
    """A SUB socket that keeps its sources whatever they send (serve's receiver, the recorder).

    Memory and the stream: ZeroMQ drops a connection, for good, when a message part exceeds
    ZMQ_MAXMSGSIZE (a protocol error: it does not redial). So the limit here is not the receiver's
    frame size but MAX_PART_BYTES, far above any message of the wire; every smaller part is received
    whole (copy=False: zmq.Frame, never copied), measured by the wire's decoder and rejected as
    'oversized' at its own cost, the stream going on with the next message. What bounds memory is
    the limit times the messages ZeroMQ may hold: at most (RCVHWM + 1) x max_part_bytes while the
    receiving thread is stalled, and in practice one part at a time, because the receiving thread
    takes each message off the socket as it arrives and drops an oversized one at once. A part above
    the limit, or a byte stream that is not ZeroMQ's, still costs the connection: a socket monitor
    sees the connection lost without a redial, counts it in `protocol_errors` and dials the endpoint
    again after REDIAL_CHECK_S (what was in flight on that connection is lost and shows as a sequence
    gap). A refused security handshake is counted in `handshakes_failed` and redialled the same way
    (backing off to REDIAL_MAX_S), so a key added to the source's folder later is picked up.

    keys: ClientKeys per endpoint (same order), or None. Use from one thread: poll(), recv(), close()."""

    def __init__(self, ctx: zmq.Context, endpoints: list[str], role: str, *, rcvhwm: int, prefix: str,
                 subscribe: bytes = b"", max_part_bytes: int = MAX_PART_BYTES,
                 keys: list[ClientKeys] | None = None):
        self.endpoints, self.role, self.prefix = list(endpoints), role, prefix
        self.max_part_bytes = max_part_bytes
        self.keys = dict(zip(self.endpoints, keys)) if keys else {}
        self.protocol_errors = self.handshakes_failed = self.redials = 0
        self._lost: dict[str, tuple[float, bool]] = {}  # endpoint -> (when lost, after a failed handshake)
        self._tries: dict[str, int] = {}  # our redials since the endpoint's last good handshake
        self._failed_handshake: set[str] = set()
        self._limit = RateLimitFilter(WARN_INTERVAL_S)
        self.monitor = None
        self.sock = ctx.socket(zmq.SUB)
        try:
            self.sock.setsockopt(zmq.LINGER, 0)
            self.sock.setsockopt(zmq.RCVHWM, rcvhwm)
            self.sock.setsockopt(zmq.MAXMSGSIZE, max_part_bytes)
            self.sock.setsockopt(zmq.SUBSCRIBE, subscribe)
            self.monitor = self.sock.get_monitor_socket(_SUB_EVENTS)
            for ep in self.endpoints:
                self._connect(ep)
        except BaseException:
            self.close()
            raise
        self.poller = zmq.Poller()
        self.poller.register(self.sock, zmq.POLLIN)
        self.poller.register(self.monitor, zmq.POLLIN)

    def _connect(self, ep: str) -> None:
        if ep in self.keys:
            self.keys[ep].apply(self.sock)  # the options of the connection made next
        connect_socket(self.sock, ep, self.role)

    def poll(self, timeout_ms: int) -> bool:
        """Wait up to timeout_ms for a message; handles connection events meanwhile. True: recv() has one."""
        ready = dict(self.poller.poll(timeout_ms))
        if self.monitor in ready:
            self._events()
        self._redial()
        return self.sock in ready

    def recv(self) -> list | None:
        """One multipart message as zmq.Frame parts (no copy), or None when none is waiting."""
        try:
            return self.sock.recv_multipart(zmq.NOBLOCK, copy=False)
        except zmq.Again:
            return None

    def _warn(self, reason: str, msg: str, *args) -> None:
        log_limited(log, self._limit, logging.WARNING, reason, "%s: " + msg, self.prefix, *args)

    def _events(self) -> None:
        while True:
            try:
                ev = recv_monitor_message(self.monitor, zmq.NOBLOCK)
            except zmq.Again:
                return
            e, ep = ev["event"], ev["endpoint"].decode("utf-8", "replace")
            if e & HANDSHAKE_FAILED_EVENTS:
                self.handshakes_failed += 1
                self._failed_handshake.add(ep)
                if e == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                    self._warn("handshake refused", "%s %s refused this side's key: add its public key (.key) to "
                               "the accepted keys folder there", self.role, ep)
                else:
                    self._warn("handshake failed", "security handshake with %s %s failed: keys on one side only, "
                               "or the public key given for it is not its key", self.role, ep)
            elif e == zmq.EVENT_DISCONNECTED:
                self._lost[ep] = (time.monotonic(), ep in self._failed_handshake)
            elif e in (zmq.EVENT_CONNECT_RETRIED, zmq.EVENT_CONNECT_DELAYED, zmq.EVENT_CONNECTED):
                self._lost.pop(ep, None)  # ZeroMQ redials by itself (a peer that went away)
            if e == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self._tries[ep] = 0
                self._failed_handshake.discard(ep)

    def _redial(self) -> None:
        now = time.monotonic()
        for ep, (t_lost, after_handshake) in list(self._lost.items()):
            tries = self._tries.get(ep, 0)
            if ep not in self.endpoints or now - t_lost < min(REDIAL_MAX_S, REDIAL_CHECK_S * 2 ** tries):
                continue
            del self._lost[ep]
            self._tries[ep] = tries + 1
            self._failed_handshake.discard(ep)
            if not after_handshake:
                self.protocol_errors += 1
                self._warn("connection dropped", "%s %s: ZeroMQ dropped the connection (a message part over the "
                           "%d-byte limit, or a byte stream that is not ZeroMQ's); connecting again", self.role, ep,
                           self.max_part_bytes)
            try:
                self.sock.disconnect(ep)
            except zmq.ZMQError:
                pass  # the endpoint is gone already
            self._connect(ep)
            self.redials += 1

    def flush_log(self, force: bool = False) -> None:
        self._limit.flush(log, force=force, prefix=f"{self.prefix}: ")

    def close(self) -> None:
        self.flush_log(force=True)
        self.monitor = _close_monitor(self.sock, self.monitor)
        self.sock.close(linger=0)


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
