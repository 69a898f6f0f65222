"""Live tuning: serve's one path for settings changes, from the watched settings file
(settingswatch.py) and from the control endpoint (control.py), with or without workers.

One change at a time. A change arrives validated (a file as at start-up; a control request's fields
as if written into the file's [processing] section over the running values). The processor makes
its chain ready aside (processors.py: serve's own chain built in a thread; with workers, serve builds
it first and then every worker builds its own and answers) while frames keep flowing with the running
settings; then, between two frames, it is committed everywhere at once: the next frame dispatched
runs with the new settings, every earlier one with the old (they are published as computed, in frame
order). A change anything refuses (the settings, the sensor, any worker) is refused whole: nobody
switches, the running settings go on everywhere, and the reason is logged, counted and given to
whoever asked. A change that changes no field is answered at once and neither built nor counted.

Settings epochs number the configurations serve runs: 0 at start-up, and each attempted change takes
the next number (a refused one uses its number up), so the epoch in health names the running
settings and tells that they changed. With workers the epoch travels in every task and result
(workproto.py, "Settings epochs").

The file and the control endpoint may both be used: a control `set` changes the fields it names on
top of the running settings; a change of the watched file applies the whole file (every field it
does not name at its default), replacing what control set. A file change noticed while another
change is being made ready waits for it; a control request then is answered 'busy'.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Callable

from .settings import ProcessingSettings
from .settingswatch import SettingsWatch, changed_fields

log = logging.getLogger(__name__)


@dataclass
class ChangeResult:
    """What became of a proposed change: applied (with the fields changed, old and new) or refused
    (`why`: 'invalid', 'refused' or 'busy', and the reason)."""

    applied: bool
    epoch: int  # the running epoch after it
    changed: dict = field(default_factory=dict)  # {field: (old, new)}
    why: str = ""
    reason: str = ""


Reply = Callable[[ChangeResult], None]


def describe_changes(changed: dict) -> str:
    return ", ".join(f"{k} {a!r} -> {b!r}" for k, (a, b) in changed.items()) or "no field changed"


class Tuner:
    """Owned by serve's processing thread: propose() changes, poll() between frames. `processor` is
    serve's LocalProcessor or PoolProcessor (prepare / commit / abort)."""

    def __init__(self, settings: ProcessingSettings, processor, watch_path: str | None = None):
        self.current, self.processor = settings, processor
        self.watch = SettingsWatch(watch_path) if watch_path is not None else None
        self.epoch = 0
        self._next_epoch = 1
        self.applied = self.refused = 0
        self.last_error: str | None = None
        self.changed_by = "start-up"
        self._change = None  # (Change, source, reply)
        self._deferred: ProcessingSettings | None = None  # a file change that waits for the one being made

    @property
    def busy(self) -> bool:
        return self._change is not None

    def refuse(self, source: str, why: str, reason: str, reply: Reply | None = None) -> None:
        """Count and log a refusal of what `source` asked for, and answer it."""
        self.refused += 1
        self.last_error = reason
        log.error("cubecast serve: settings from %s refused, running settings kept: %s", source, reason)
        if reply is not None:
            reply(ChangeResult(False, self.epoch, why=why, reason=reason))

    def propose(self, settings: ProcessingSettings, source: str, reply: Reply | None = None) -> None:
        """Make `settings` (validated) the running ones. `reply` is called once, from poll() (or at
        once for a change that changes nothing or finds another one being made ready)."""
        if self.busy:
            if reply is not None:
                reply(ChangeResult(False, self.epoch, why="busy", reason=(
                    f"another settings change (from {self._change[1]}) is being made ready; ask again when it "
                    "is done")))
            return
        if settings == self.current:
            log.info("cubecast serve: settings from %s: no field changed", source)
            if reply is not None:
                reply(ChangeResult(True, self.epoch))
            return
        epoch, self._next_epoch = self._next_epoch, self._next_epoch + 1
        self._change = (self.processor.prepare(settings, epoch), source, reply)

    def poll(self, now: float | None = None) -> ProcessingSettings | None:
        """Between frames: apply a change that is ready (returns its settings), refuse one that was
        refused, and look at the watched file."""
        if self.watch is not None:
            seen = self.watch.poll(now)
            if seen is not None:
                kind, value = seen
                source = f"file {self.watch.path}"
                if kind == "refused":
                    self.refuse(source, "invalid", value)
                elif self.busy:
                    self._deferred = value
                else:
                    self.propose(value, source)
        if self._change is None:
            if self._deferred is not None and self.watch is not None:
                settings, self._deferred = self._deferred, None
                self.propose(settings, f"file {self.watch.path}")
            return None
        change, source, reply = self._change
        state = change.poll()
        if state == "building":
            return None
        self._change = None
        if state == "refused":
            self.processor.abort(change)
            self.refuse(source, "refused", change.reason, reply)
            return None
        self.processor.commit(change)
        diff = changed_fields(self.current, change.settings)
        self.current, self.epoch, self.changed_by = change.settings, change.epoch, source
        self.applied += 1
        self.last_error = None
        log.info("cubecast serve: settings from %s applied (epoch %d): %s", source, change.epoch,
                 describe_changes(diff))
        if reply is not None:
            reply(ChangeResult(True, self.epoch, diff))
        return self.current

    def health_fields(self) -> dict:
        return {"settings_applied": self.applied, "settings_refused": self.refused,
                "settings_error": self.last_error, "settings_epoch": self.epoch,
                "settings_changed_by": self.changed_by}
