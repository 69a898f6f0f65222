"""Live tuning: serve watches its settings file and applies a changed one at the next frame.

The processing thread polls the file's size and modification time every POLL_S (one os.stat). A
change is taken once the file has stayed the same for one more poll (an editor that truncates and
then writes is read when it is done). The file is then read and validated as at start-up, and a new
chain is built for it in a background thread, so frames keep flowing with the old settings; the
processing thread swaps the new chain in between two frames. A file that does not read, does not
validate or does not build a chain (for example a range gate beyond the sensor) is refused with the
reason logged, counted, and the running settings kept: nothing is applied half-way. Each applied
change is logged with the fields that changed, old and new values.

This is I/O at the edge: the chain itself stays pure (a new Pipeline per change).
"""

from __future__ import annotations

import dataclasses
import logging
import os
import threading
import time
from typing import Callable

from .errors import CubecastError
from .settings import ProcessingSettings, load_settings

log = logging.getLogger(__name__)

POLL_S = 0.5


def changed_fields(old: ProcessingSettings, new: ProcessingSettings) -> dict:
    """{field: (old, new)} for the fields that differ."""
    return {f.name: (getattr(old, f.name), getattr(new, f.name)) for f in dataclasses.fields(old)
            if getattr(old, f.name) != getattr(new, f.name)}


class SettingsWatch:
    """Watches `path`; `build(settings)` makes the chain for new settings (run in a background
    thread; it may raise CubecastError). poll() returns (settings, chain) once per applied change."""

    def __init__(self, path: str, current: ProcessingSettings, build: Callable[[ProcessingSettings], object]):
        self.path, self.current, self._build = str(path), current, build
        self.applied = self.refused = 0
        self.last_error: str | None = None
        self._seen = self._signature()
        self._pending: tuple | None = None
        self._next_poll = 0.0
        self._ready: tuple | None = None
        self._worker: threading.Thread | None = None
        self._lock = threading.Lock()

    def _signature(self) -> tuple | None:
        try:
            st = os.stat(self.path)
        except OSError:
            return None
        return (st.st_mtime_ns, st.st_size)

    def _refuse(self, reason: str) -> None:
        self.refused += 1
        self.last_error = reason
        log.error("cubecast serve: settings %s refused, running settings kept: %s", self.path, reason)

    def _load_and_build(self) -> None:
        try:
            settings = load_settings(self.path)
            chain = self._build(settings)
        except CubecastError as exc:
            self._refuse(str(exc))
            return
        with self._lock:
            self._ready = (settings, chain)

    def poll(self, now: float | None = None) -> tuple | None:
        """Call between frames; cheap (an os.stat every POLL_S). Returns (settings, chain) to apply
        now, or None."""
        with self._lock:
            ready, self._ready = self._ready, None
        if ready is not None:
            diff = changed_fields(self.current, ready[0])
            self.current = ready[0]
            self.applied += 1
            self.last_error = None
            log.info("cubecast serve: settings %s applied: %s", self.path,
                     ", ".join(f"{k} {a!r} -> {b!r}" for k, (a, b) in diff.items()) or "no field changed")
            return ready
        now = time.monotonic() if now is None else now
        if now < self._next_poll or (self._worker is not None and self._worker.is_alive()):
            return None
        self._next_poll = now + POLL_S
        sig = self._signature()
        if sig == self._seen:
            self._pending = None
            return None
        if sig is None:
            if self._pending != ("gone",):
                self._pending = ("gone",)
                self._refuse("the file is gone (or unreadable); it is read again when it comes back")
            return None
        if self._pending != sig:   # changed: wait one more poll for it to settle
            self._pending = sig
            return None
        self._seen, self._pending = sig, None
        self._worker = threading.Thread(target=self._load_and_build, name="cubecast-settings", daemon=True)
        self._worker.start()
        return None
