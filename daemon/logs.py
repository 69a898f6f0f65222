"""Logging for cubecast: the standard logging module, one logger per module, set up once by the CLI.

Modules log with `log = logging.getLogger(__name__)` and never print status lines; only a command's
result (a table, a JSON document) goes to standard output. `configure` (called by the CLI from
-v / -q / --log-json) sends records to standard error, as plain lines or as one JSON object per
line for log collectors.

Rate limiting is a filter: a record that carries `extra={"reason": ...}` passes at most once per
reason per interval; the suppressed ones are counted, the next record of that reason that passes
says how many it stands for, and `RateLimitFilter.flush` logs a summary of the reasons still
pending (call it periodically and at shutdown).
"""

from __future__ import annotations

import datetime as _dt
import json
import logging
import math
import sys
import threading
import time

ROOT = "cubecast"

# Fields of a LogRecord that are not `extra` given by the caller.
_RECORD_FIELDS = frozenset(vars(logging.LogRecord("", 0, "", 0, "", (), None))) | {"message", "asctime"}


def level_for(verbose: int = 0, quiet: int = 0) -> int:
    """-v -> DEBUG, nothing -> INFO, -q -> WARNING, -qq -> ERROR."""
    steps = [logging.DEBUG, logging.INFO, logging.WARNING, logging.ERROR]
    return steps[max(0, min(len(steps) - 1, 1 - verbose + quiet))]


class JsonFormatter(logging.Formatter):
    """One JSON object per line: time (UTC, ISO 8601), level, logger, message, and every `extra`."""

    def format(self, record: logging.LogRecord) -> str:
        doc = {
            "time": _dt.datetime.fromtimestamp(record.created, _dt.timezone.utc).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        for key, value in vars(record).items():
            if key not in _RECORD_FIELDS and not key.startswith("_"):
                doc[key] = value if isinstance(value, (str, int, float, bool, type(None))) else str(value)
        if record.exc_info:
            doc["exception"] = self.formatException(record.exc_info)
        return json.dumps(doc, ensure_ascii=False)


class _StderrHandler(logging.StreamHandler):
    """A StreamHandler on whatever `sys.stderr` is when a record is emitted (so a test's capture, or a
    stream replaced after set-up, receives the lines instead of a closed file)."""

    def __init__(self):
        logging.Handler.__init__(self)

    @property
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, value):  # StreamHandler.setStream; the stream always follows sys.stderr
        pass


def configure(level: int = logging.INFO, json_lines: bool = False, stream=None) -> logging.Handler:
    """Send the `cubecast` loggers' records at `level` and above to `stream` (default: standard error,
    as it is at each record). Replaces a handler an earlier call installed, so it can be called again
    (tests, subcommands)."""
    root = logging.getLogger(ROOT)
    for h in list(root.handlers):
        if getattr(h, "_cubecast", False):
            root.removeHandler(h)
    handler = logging.StreamHandler(stream) if stream is not None else _StderrHandler()
    handler._cubecast = True
    handler._json_lines = json_lines
    handler.setFormatter(JsonFormatter() if json_lines else logging.Formatter("%(message)s"))
    root.addHandler(handler)
    root.setLevel(level)
    root.propagate = False
    return handler


def uses_json_lines() -> bool:
    """True when `configure` set up JSON lines (child processes can be started the same way)."""
    return any(getattr(h, "_json_lines", False) for h in logging.getLogger(ROOT).handlers)


def show_progress() -> bool:
    """Progress bars (on standard error) are for people: shown at INFO or lower, not with JSON lines."""
    return logging.getLogger(ROOT).isEnabledFor(logging.INFO) and not uses_json_lines()


class RateLimitFilter(logging.Filter):
    """At most one record per reason per `interval_s` (records without a `reason` always pass).
    Attach it to the logger whose records it limits: `log.addFilter(RateLimitFilter())`."""

    def __init__(self, interval_s: float = 5.0):
        super().__init__()
        self.interval_s = interval_s
        self._last: dict[str, float] = {}
        self._pending: dict[str, tuple[int, str, int]] = {}   # reason -> (count, latest text, level)
        self._lock = threading.Lock()

    def filter(self, record: logging.LogRecord) -> bool:
        reason = getattr(record, "reason", None)
        if reason is None or getattr(record, "summary", False):
            return True
        now = time.monotonic()
        with self._lock:
            n, _, _ = self._pending.get(reason, (0, "", 0))
            if now - self._last.get(reason, -math.inf) < self.interval_s:
                self._pending[reason] = (n + 1, record.getMessage(), record.levelno)
                return False
            self._last[reason] = now
            self._pending.pop(reason, None)
        if n:
            record.msg, record.args = f"{record.getMessage()} (and {n} more since the last report)", ()
            record.suppressed = n
        return True

    def flush(self, logger: logging.Logger, force: bool = False, prefix: str = "") -> None:
        """Log one summary line for every reason whose suppressed records are due (all with force)."""
        now = time.monotonic()
        due = []
        with self._lock:
            for reason, (n, text, level) in list(self._pending.items()):
                if force or now - self._last.get(reason, -math.inf) >= self.interval_s:
                    self._last[reason] = now
                    del self._pending[reason]
                    due.append((reason, n, text, level))
        for reason, n, text, level in due:
            logger.log(level, "%s%s: %d more in the last %g s; latest: %s", prefix, reason, n, self.interval_s, text,
                       extra={"reason": reason, "summary": True, "suppressed": n})


def log_limited(logger: logging.Logger, limit: RateLimitFilter, level: int, reason: str, msg: str, *args) -> None:
    """Log one record through `limit` (at most one per reason per interval, logs.RateLimitFilter)
    without attaching the filter to the module's logger, so that every instance (a Service, a pool)
    keeps its own intervals. `limit.flush(logger, ...)` reports the suppressed ones."""
    if not logger.isEnabledFor(level):
        return
    record = logger.makeRecord(logger.name, level, "(unknown file)", 0, msg, args, None, extra={"reason": reason})
    if limit.filter(record):
        logger.handle(record)
