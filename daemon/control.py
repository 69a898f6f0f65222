"""serve's control endpoint (`serve --control ENDPOINT`): read and change the running processing
settings while serve runs, from `cubecast tune`, the viewer's keys or a script.

serve binds a ROUTER; a client connects a REQ (or a DEALER) and sends one message part, a msgpack
map, per request; serve answers each with one msgpack map:

    {"op": "get"}                                   -> the running settings
    {"op": "set", "settings": {field: value, ...}}  -> change those fields, at the next frame

A request is decoded as the wire's headers are (daemon/schema.py): at most MAX_REQUEST_BYTES, msgpack
with every length bounded, no ext types, a map with string keys, then checked against
ControlRequest; fields other than `op` and `settings` are refused (a typo never turns a `set` into
something else). The `settings` of a `set` are validated exactly as a settings file: as if its
[processing] section held the running values with these fields written over them (the same reader,
config.py: unknown fields named with the closest one, types, ranges, the rules between fields).
Valid settings then go to serve's Tuner (daemon/retune.py), which builds the chain aside (with
workers, every worker builds its own) and swaps it in between two frames; the reply comes when the
change is applied, or refused with the reason.

Every reply: {"control": 1, "ok": bool, "epoch": running settings epoch, "settings": {all fields},
"changed": {field: [old, new]} (a set that was applied), "changed_by": what made the last change,
"error": text and "reason": one of REASONS when ok is false}. Reasons: 'malformed' (not msgpack, not
a map, a wrong type or an unknown field of the request), 'oversized', 'invalid' (settings that do not
validate), 'refused' (a chain the sensor or a worker cannot build), 'busy' (another change is being
made ready: ask again). A request over MAX_REQUEST_BYTES gets an 'oversized' reply; a message part
over MAX_PART_BYTES makes ZeroMQ drop the connection (the client sees no reply).

Security: the endpoint changes what serve computes, so without keys it binds only addresses no other
host can reach (loopback, ipc://); --insecure does not cover it. With keys (serve --server-key
--control-keys DIR; tune and view --server-key --key) every connection is authenticated and encrypted
with CURVE, and a key not in the folder is refused in the handshake (counted in health as
`control_handshakes_refused`).

The viewer speaks this protocol with its own few lines (viewer/tuning.py), since it imports only the
wire module of the daemon.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from typing import Annotated, Any, Literal

import msgpack
import msgspec
import zmq
from msgspec import Meta

from .config import Document
from .errors import CubecastError
from .keys import ClientKeys, ServerKeys
from .netio import HandshakeCounter, bind_socket, connect_socket, host_only
from .retune import ChangeResult, Tuner
from .schema import MAX_ENTRIES, Count, Flag, Schema, optional, text, unpack, validate
from .settings import ProcessingSettings, settings_from_document

log = logging.getLogger(__name__)

CONTROL_VERSION = 1
REASONS = ("malformed", "oversized", "invalid", "refused", "busy")
MAX_REQUEST_BYTES = 64 * 1024
MAX_PART_BYTES = 1024 * 1024  # ZMQ_MAXMSGSIZE: above it ZeroMQ drops the connection
MAX_REPLY_BYTES = 256 * 1024
MAX_ERROR_CHARS = 4000
MAX_REQUESTS_PER_POLL = 64
REQUEST_FIELDS = ("op", "settings")
CONTROL_EXPOSES = "the processing settings, to read and to change"
SET_TIMEOUT_S = 120.0  # a client waits this long for a `set`: serve and every worker build the chain first


class ControlError(CubecastError):
    """A control request or reply that breaks the protocol; `reason` is one of REASONS."""

    def __init__(self, reason: str, message: str):
        assert reason in REASONS, reason
        super().__init__(message)
        self.reason = reason


# ---- schemas (annotations are module-level names: the string annotations resolve to these) ------------

SettingsMap = Annotated[dict[str, Any], Meta(max_length=MAX_ENTRIES,
                                             description="must be a map of [processing] field names to values")]
OptionalSettingsMap = Annotated[SettingsMap | None, Meta(description="must be a map of [processing] field names "
                                                                     "to values")]
SettingValue = str | int | float | bool
SettingValues = Annotated[dict[str, SettingValue], Meta(max_length=MAX_ENTRIES, description="must map field names "
                                                                                             "to values")]
Changes = Annotated[dict[str, list], Meta(max_length=MAX_ENTRIES, description="must map field names to [old, new]")]
Op = Annotated[Literal["get", "set"], Meta(description="must be 'get' or 'set'")]
Version = Annotated[Literal[1], Meta(description="must be 1 (this cubecast speaks control version 1)")]
ChangedBy = text(512, 0)
ErrorText = optional(text(MAX_ERROR_CHARS, 0))
Reason = Annotated[Literal[REASONS] | None, Meta(description=f"must be one of {', '.join(REASONS)} or nil")]


class ControlRequest(Schema):
    op: Op
    settings: OptionalSettingsMap = None


class ControlReply(Schema):
    control: Version
    ok: Flag
    epoch: Count
    settings: SettingValues
    changed_by: ChangedBy
    changed: Changes = {}
    error: ErrorText = None
    reason: Reason = None


# ---- pure: requests, settings, replies ------------------------------------------------------------------

def _error(reason: str, message: str) -> ControlError:
    return ControlError("oversized" if reason == "oversized" else "malformed", message)


def decode_request(data: Any) -> ControlRequest:
    """One request part, bounded and checked (ControlError naming what is wrong)."""
    header = unpack(data, "control request", MAX_REQUEST_BYTES, _error)
    unknown = sorted(str(k) for k in header if k not in REQUEST_FIELDS)
    if unknown:
        raise ControlError("malformed", f"control request field {unknown[0]!r} is not known (a request has "
                                        f"{' and '.join(REQUEST_FIELDS)})")
    req = validate(header, ControlRequest, "control request", _error)
    if req.op == "set" and req.settings is None:
        raise ControlError("malformed", "control request: a 'set' needs 'settings', a map of [processing] "
                                        "fields to their new values")
    if req.op == "get" and req.settings is not None:
        raise ControlError("malformed", "control request: a 'get' takes no 'settings' (use op 'set' to change "
                                        "them)")
    return req


def settings_map(settings: ProcessingSettings) -> dict:
    return dataclasses.asdict(settings)


def merge_settings(current: ProcessingSettings, changes: dict, origin: str = "control request") -> ProcessingSettings:
    """The running settings with `changes` written over them, validated exactly as a settings file
    whose [processing] section held them all (CubecastError naming the field, value and rule)."""
    values = {**settings_map(current), **changes}
    return settings_from_document(Document({"processing": values}, "", origin))


def encode_reply(ok: bool, tuner: Tuner, *, changed: dict | None = None, error: str | None = None,
                 reason: str | None = None) -> bytes:
    body = {"control": CONTROL_VERSION, "ok": bool(ok), "epoch": int(tuner.epoch),
            "settings": settings_map(tuner.current), "changed_by": tuner.changed_by[:512],
            "changed": {k: [a, b] for k, (a, b) in (changed or {}).items()},
            "error": None if error is None else str(error)[:MAX_ERROR_CHARS], "reason": reason}
    return msgpack.packb(body, use_bin_type=True)


def decode_reply(data: Any, endpoint: str) -> dict:
    """A reply as a plain map (every field checked), or CubecastError naming the endpoint."""
    def error(reason: str, message: str) -> CubecastError:
        return CubecastError(f"control endpoint {endpoint}: {message}")

    header = unpack(data, "control reply", MAX_REPLY_BYTES, error)
    return msgspec.to_builtins(validate(header, ControlReply, "control reply", error))


def toml_value(value: Any) -> str:
    """A setting's value as TOML writes it (strings quoted, booleans lowercase, floats round-trip)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, float) and math.isfinite(value):
        return repr(value)
    return str(value)


def settings_toml(values: dict) -> str:
    """A [processing] section holding `values` (what `cubecast tune --get` prints: a settings file)."""
    return "[processing]\n" + "".join(f"{k} = {toml_value(v)}\n" for k, v in values.items())


# ---- serve's end ------------------------------------------------------------------------------------------

def check_control_exposure(endpoint: str, keyed: bool) -> None:
    """Without keys the control endpoint binds only where no other host reaches (no --insecure)."""
    if keyed or host_only(endpoint):
        return
    raise CubecastError(f"control endpoint {endpoint}: reachable from other hosts, and no keys are given: anyone who "
                        f"reaches it would get {CONTROL_EXPOSES}. Give keys (--server-key FILE --control-keys DIR, "
                        "made with `cubecast keys`) or bind a loopback address; --insecure does not cover this "
                        "endpoint")


class ControlEndpoint:
    """serve's ROUTER for control requests; used by serve's processing thread only (bind, poll,
    close). Valid `set` requests go to the Tuner, whose answer is sent back when it comes."""

    def __init__(self, endpoint: str, tuner: Tuner, keys: ServerKeys | None = None):
        check_control_exposure(endpoint, keys is not None)
        self.endpoint_requested, self.tuner, self.keys = endpoint, tuner, keys
        self.endpoint: str | None = None
        self.sock: zmq.Socket | None = None
        self.requests = self.requests_invalid = 0
        self._counter: HandshakeCounter | None = None
        self._refused = 0

    def bind(self, ctx: zmq.Context) -> str:
        sock = self.sock = ctx.socket(zmq.ROUTER)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_PART_BYTES)
        sock.setsockopt(zmq.RCVHWM, 16)
        sock.setsockopt(zmq.SNDHWM, 64)
        if self.keys is not None:
            self.keys.start(ctx)
            self.keys.apply(sock)
            self._counter = HandshakeCounter(sock, "control endpoint", "cubecast serve")
        self.endpoint = bind_socket(sock, self.endpoint_requested, "control endpoint")
        return self.endpoint

    def counters(self) -> dict:
        if self._counter is not None:
            self._refused = self._counter.count()
        return {"control_requests": self.requests, "control_requests_invalid": self.requests_invalid,
                "control_handshakes_refused": self._refused}

    def _send(self, envelope: list, body: bytes) -> None:
        try:
            self.sock.send_multipart(envelope + [body], flags=zmq.NOBLOCK)
        except zmq.ZMQError:
            pass  # the client is gone, or does not read its replies: it loses only its own

    def poll(self) -> None:
        """Answer what is waiting (at most MAX_REQUESTS_PER_POLL requests); never blocks."""
        for _ in range(MAX_REQUESTS_PER_POLL):
            try:
                parts = self.sock.recv_multipart(zmq.NOBLOCK, copy=False)
            except zmq.Again:
                return
            self._request(parts)

    def _request(self, parts: list) -> None:
        self.requests += 1
        rest = parts[1:]
        delimited = bool(rest) and rest[0].bytes == b""   # a REQ client's empty delimiter
        envelope = [parts[0].bytes] + ([b""] if delimited else [])
        body = rest[1:] if delimited else rest
        try:
            peer = parts[-1].get("Peer-Address")
        except (zmq.ZMQError, AttributeError, ValueError):
            peer = None
        source = f"control request from {peer or 'a local peer'}"
        try:
            if len(body) != 1:
                raise ControlError("malformed", f"a control request is one message part (a msgpack map); got "
                                                f"{len(body)}")
            req = decode_request(body[0])
        except ControlError as exc:
            self.requests_invalid += 1
            log.warning("cubecast serve: %s refused: %s", source, exc)
            self._send(envelope, encode_reply(False, self.tuner, error=str(exc), reason=exc.reason))
            return
        if req.op == "get":
            self._send(envelope, encode_reply(True, self.tuner))
            return

        def answer(result: ChangeResult) -> None:
            if result.applied:
                self._send(envelope, encode_reply(True, self.tuner, changed=result.changed))
            else:
                self._send(envelope, encode_reply(False, self.tuner, error=result.reason, reason=result.why))

        try:
            settings = merge_settings(self.tuner.current, req.settings)
        except CubecastError as exc:
            self.tuner.refuse(source, "invalid", str(exc), answer)
            return
        self.tuner.propose(settings, source, answer)

    def close(self) -> None:
        if self._counter is not None:
            self._refused = self._counter.count()
            self._counter.close()
            self._counter = None
        if self.sock is not None:
            self.sock.close(linger=0)
            self.sock = None
        if self.keys is not None:
            self.keys.stop()


# ---- the client's end (cubecast tune, tests) --------------------------------------------------------------

def request(endpoint: str, body: dict, timeout_s: float, keys: ClientKeys | None = None,
            ctx: zmq.Context | None = None) -> dict:
    """Send one request and return serve's reply (a checked map); CubecastError naming the endpoint
    when nobody answers within timeout_s."""
    own = ctx is None
    ctx = ctx or zmq.Context()
    sock = ctx.socket(zmq.REQ)
    try:
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_REPLY_BYTES)
        if keys is not None:
            keys.apply(sock)
        connect_socket(sock, endpoint, "control endpoint")
        sock.send(msgpack.packb(body, use_bin_type=True))
        if not sock.poll(int(timeout_s * 1000)):
            keyed = ", and is this key in its --control-keys folder" if keys else ""
            raise CubecastError(f"control endpoint {endpoint}: no answer within {timeout_s:g} s (is serve running "
                                f"with --control {endpoint}{keyed}?)")
        return decode_reply(sock.recv(), endpoint)
    finally:
        sock.close(linger=0)
        if own:
            ctx.term()
