"""The viewer's tuning keys (`cubecast view --control ENDPOINT`): common detection settings of a running
serve changed from the keyboard, through serve's control endpoint (daemon/control.py describes the
protocol: one msgpack map per request and per reply).

    f / F    CFAR false-alarm probability (Pfa) / 10, x 10
    k / K    CFAR kind: next, previous (ca, os, go, so)
    g / G    CFAR guard cells -1, +1 (range and Doppler)
    t / T    CFAR training cells -1, +1 (range and Doppler)

A key press only queues the key: a background thread asks serve for the running settings (`get`),
works out the change from them (change_for_key, a pure function) and sends it (`set`); serve
validates it as a settings file, builds the chain and answers when it is applied or refused. The
result becomes a notice for the status line (take_notice, from the GUI's timer), so drawing never
waits on the network. Limits (Pfa in (0, 0.5), cells >= 0 or >= 1) are serve's to enforce: a key
that goes past one shows serve's refusal with its reason.

The few lines of the protocol are written here on purpose: the viewer depends on the wire module
of the daemon only (its bounded msgpack reader checks the reply), and on pyzmq.
"""

from __future__ import annotations

import logging
import queue
import threading

from ..daemon import wire

log = logging.getLogger(__name__)

CFAR_KINDS = ("ca", "os", "go", "so")   # the order k steps through (serve's settings name them)
TUNING_KEYS = ("f", "F", "k", "K", "g", "G", "t", "T")
HELP_ROWS: tuple[tuple[str, str], ...] = (
    ("f / F", "with --control: CFAR Pfa / 10, x 10"),
    ("k / K", "with --control: CFAR kind next, previous"),
    ("g / G", "with --control: CFAR guard cells -1, +1"),
    ("t / T", "with --control: CFAR training cells -1, +1"),
)
GET_TIMEOUT_S = 2.0
SET_TIMEOUT_S = 120.0   # serve (and every worker) builds the chain before it answers
MAX_REPLY_BYTES = 256 * 1024
MAX_NOTICE_CHARS = 160
MAX_WAITING_KEYS = 8


def _round(x: float) -> float:
    """x to 12 significant digits: 1e-6 x 10 is 1e-05, not 9.999999999999999e-06."""
    return float(f"{x:.12g}")


def change_for_key(key: str, settings: dict) -> dict | None:
    """The partial settings change key `key` asks for, given the running settings (the `settings`
    map of a control reply); None when `key` is no tuning key or the settings lack its fields."""
    try:
        if key in ("f", "F"):
            pfa = settings["cfar_pfa"]
            return {"cfar_pfa": _round(pfa / 10.0 if key == "f" else pfa * 10.0)}
        if key in ("k", "K"):
            kind = settings["cfar_kind"]
            i = CFAR_KINDS.index(kind) if kind in CFAR_KINDS else -1
            return {"cfar_kind": CFAR_KINDS[(i + (1 if key == "k" else -1)) % len(CFAR_KINDS)]}
        if key in ("g", "G", "t", "T"):
            step = 1 if key.isupper() else -1
            names = ("cfar_guard_range", "cfar_guard_doppler") if key in ("g", "G") else \
                ("cfar_train_range", "cfar_train_doppler")
            return {n: settings[n] + step for n in names}
    except (KeyError, TypeError):
        return None
    return None


def _text(value) -> str:
    return f"{value:g}" if isinstance(value, float) else str(value)


def describe_reply(reply: dict) -> str:
    """The status-line notice of a `set` reply."""
    if not reply.get("ok"):
        text = f"tuning refused ({reply.get('reason')}): {reply.get('error')}"
    elif not reply.get("changed"):
        text = f"tuning: nothing changed (settings epoch {reply.get('epoch')})"
    else:
        changes = ", ".join(f"{k} {_text(a)} -> {_text(b)}" for k, (a, b) in reply["changed"].items())
        text = f"tuning applied (settings epoch {reply.get('epoch')}): {changes}"
    return text if len(text) <= MAX_NOTICE_CHARS else text[:MAX_NOTICE_CHARS - 3] + "..."


def _reply_error(reason: str, message: str) -> ValueError:
    return ValueError(message)


def check_reply(data) -> dict:
    """A reply read with the wire's bounded msgpack reader; its fields checked (ValueError if not)."""
    reply = wire.unpack(data, "control reply", MAX_REPLY_BYTES, _reply_error)
    if not isinstance(reply.get("ok"), bool) or not isinstance(reply.get("settings"), dict):
        raise ValueError("control reply without 'ok' (true or false) and 'settings' (a map)")
    changed = reply.get("changed", {})
    if not isinstance(changed, dict) or any(not (isinstance(v, list) and len(v) == 2) for v in changed.values()):
        raise ValueError("control reply field 'changed' must map field names to [old, new]")
    reply["changed"] = changed
    return reply


class TuningClient:
    """Tuning keys to serve's control endpoint, off the GUI thread. press(key) from the GUI (True for a
    tuning key), take_notice() from its timer, stop() when the window closes."""

    def __init__(self, endpoint: str, keys=None, *, context=None, get_timeout_s: float = GET_TIMEOUT_S,
                 set_timeout_s: float = SET_TIMEOUT_S):
        self.endpoint, self.keys = endpoint, keys
        self.get_timeout_s, self.set_timeout_s = get_timeout_s, set_timeout_s
        self._ctx = context
        self._keys: queue.Queue = queue.Queue(MAX_WAITING_KEYS)
        self._notices: queue.Queue = queue.Queue()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.sent = 0

    def start(self) -> "TuningClient":
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="cubecast-view-tuning", daemon=True)
            self._thread.start()
        return self

    def press(self, key: str) -> bool:
        if key not in TUNING_KEYS:
            return False
        try:
            self._keys.put_nowait(key)
        except queue.Full:
            self._notices.put("tuning: keys are coming faster than serve answers; this one is dropped")
        return True

    def take_notice(self) -> str | None:
        """The newest notice since the last call (older ones are superseded), or None."""
        notice = None
        while True:
            try:
                notice = self._notices.get_nowait()
            except queue.Empty:
                return notice

    def stop(self, timeout_s: float = 1.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
            self._thread = None

    # the thread side
    def _run(self) -> None:
        import zmq
        ctx = self._ctx or zmq.Context.instance()
        while not self._stop.is_set():
            try:
                key = self._keys.get(timeout=0.1)
            except queue.Empty:
                continue
            try:
                self._notices.put(self._handle(ctx, key))
            except Exception as exc:   # a bad endpoint, a reply that is not one: said, never raised in the GUI
                self._notices.put(f"tuning: {exc}"[:MAX_NOTICE_CHARS])
                log.warning("cubecast view: tuning key %s: %s", key, exc)

    def _handle(self, ctx, key: str) -> str:
        got = self._request(ctx, {"op": "get"}, self.get_timeout_s)
        if got is None:
            return f"tuning: no answer from {self.endpoint} within {self.get_timeout_s:g} s"
        change = change_for_key(key, got["settings"])
        if change is None:
            return f"tuning: serve's settings have no field for key {key}"
        self._notices.put("tuning: asking for " + ", ".join(f"{k} = {_text(v)}" for k, v in change.items()))
        self.sent += 1
        reply = self._request(ctx, {"op": "set", "settings": change}, self.set_timeout_s)
        if reply is None:
            return f"tuning: no answer from {self.endpoint} within {self.set_timeout_s:g} s"
        return describe_reply(reply)

    def _request(self, ctx, body: dict, timeout_s: float) -> dict | None:
        import msgpack
        import zmq
        sock = ctx.socket(zmq.REQ)
        try:
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.MAXMSGSIZE, MAX_REPLY_BYTES)
            if self.keys is not None:
                self.keys.apply(sock)
            sock.connect(self.endpoint)
            sock.send(msgpack.packb(body, use_bin_type=True))
            deadline_ms = int(timeout_s * 1000)
            while deadline_ms > 0 and not self._stop.is_set():   # in slices: a closing window does not wait
                if sock.poll(min(100, deadline_ms)):
                    return check_reply(sock.recv())
                deadline_ms -= 100
            return None
        finally:
            sock.close(0)
