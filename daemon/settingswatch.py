"""Live tuning from a file: serve's watched settings file (`serve --settings F --watch-settings`).

The processing thread polls the file's size and modification time every POLL_S (one os.stat). A
change is taken once the file has stayed the same for one more poll (an editor that truncates and
then writes is read when it is done). The file is then read and validated as at start-up, in a
background thread; poll() hands the settings it holds to serve's Tuner (daemon/retune.py), which
builds the chain for them aside and swaps it in between two frames, with or without workers. A file
that does not read or does not validate is handed over as a refusal with its reason; the Tuner
counts it and keeps the running settings. The file holds the whole [processing] section: every
field it does not name takes its default, whatever a control request set before.

This is I/O at the edge: the chain itself stays pure (a new Pipeline per change).
"""

from __future__ import annotations

import dataclasses
import os
import threading
import time

from .errors import CubecastError
from .settings import ProcessingSettings, load_settings

POLL_S = 0.5


def changed_fields(old: ProcessingSettings, new: ProcessingSettings) -> dict:
    """{field: (old, new)} for the fields that differ."""
    return {f.name: (getattr(old, f.name), getattr(new, f.name)) for f in dataclasses.fields(old)
            if getattr(old, f.name) != getattr(new, f.name)}


class SettingsWatch:
    """Watches `path`. poll() returns, once per change of the file, ("settings", ProcessingSettings)
    when it reads and validates, or ("refused", reason) when it does not (or is gone); else None."""

    def __init__(self, path: str):
        self.path = str(path)
        self._seen = self._signature()
        self._pending: tuple | None = None
        self._next_poll = 0.0
        self._ready: tuple | None = None
        self._reader: threading.Thread | None = None
        self._lock = threading.Lock()

    def _signature(self) -> tuple | None:
        try:
            st = os.stat(self.path)
        except OSError:
            return None
        return (st.st_mtime_ns, st.st_size)

    def _read(self) -> None:
        try:
            result = ("settings", load_settings(self.path))
        except CubecastError as exc:
            result = ("refused", str(exc))
        with self._lock:
            self._ready = result

    def poll(self, now: float | None = None) -> tuple | None:
        """Call between frames; cheap (an os.stat every POLL_S)."""
        with self._lock:
            ready, self._ready = self._ready, None
        if ready is not None:
            return ready
        now = time.monotonic() if now is None else now
        if now < self._next_poll or (self._reader is not None and self._reader.is_alive()):
            return None
        self._next_poll = now + POLL_S
        sig = self._signature()
        if sig == self._seen:
            self._pending = None
            return None
        if sig is None:
            if self._pending != ("gone",):
                self._pending = ("gone",)
                return ("refused", "the file is gone (or unreadable); it is read again when it comes back")
            return None
        if self._pending != sig:   # changed: wait one more poll for it to settle
            self._pending = sig
            return None
        self._seen, self._pending = sig, None
        self._reader = threading.Thread(target=self._read, name="cubecast-settings-read", daemon=True)
        self._reader.start()
        return None
