"""Logging set-up: plain and JSON-lines output, the -v/-q level ladder, and the rate-limiting filter
(with a hand-driven clock, so no test depends on real time)."""

from __future__ import annotations

import datetime as dt
import io
import json
import logging
import types

import pytest

from cubecast.daemon import logs


@pytest.fixture
def buf():
    stream = io.StringIO()
    yield stream
    logs.configure(logging.INFO)  # back to standard error for the tests that follow


def test_level_for_follows_the_logging_ladder():
    # levels as the logging module defines them: DEBUG 10, INFO 20, WARNING 30, ERROR 40
    assert logs.level_for() == 20
    assert logs.level_for(verbose=1) == 10 and logs.level_for(verbose=3) == 10
    assert logs.level_for(quiet=1) == 30 and logs.level_for(quiet=2) == 40 and logs.level_for(quiet=5) == 40
    assert logs.level_for(verbose=1, quiet=1) == 20


def test_configure_plain_lines_at_the_level(buf):
    logs.configure(logging.WARNING, stream=buf)
    log = logging.getLogger("cubecast.test_logs.plain")
    log.info("not shown")
    log.warning("shown %d", 7)
    log.error("also shown")
    logging.getLogger("elsewhere.test_logs").warning("another package's logger is left alone")
    assert buf.getvalue() == "shown 7\nalso shown\n"
    assert not logs.show_progress() and not logs.uses_json_lines()
    logs.configure(logging.INFO, stream=buf)  # a second call replaces the first handler
    log.info("once")
    assert buf.getvalue().endswith("also shown\nonce\n")
    assert sum(getattr(h, "_cubecast", False) for h in logging.getLogger("cubecast").handlers) == 1
    assert logs.show_progress()


def test_configure_json_lines(buf):
    logs.configure(logging.DEBUG, json_lines=True, stream=buf)
    log = logging.getLogger("cubecast.test_logs.json")
    log.debug("frame %d late", 12, extra={"reason": "late", "seq": 12, "path": ["a"]})
    try:
        raise ValueError("bad value")
    except ValueError:
        log.exception("it failed")
    docs = [json.loads(line) for line in buf.getvalue().splitlines()]
    assert len(docs) == 2  # the traceback sits inside the second object, not on lines of its own
    first, second = docs
    assert first["level"] == "debug" and first["logger"] == "cubecast.test_logs.json"
    assert first["message"] == "frame 12 late"
    assert first["reason"] == "late" and first["seq"] == 12 and first["path"] == "['a']"
    when = dt.datetime.fromisoformat(first["time"])
    assert when.utcoffset() == dt.timedelta(0)
    assert abs((dt.datetime.now(dt.timezone.utc) - when).total_seconds()) < 3600
    assert second["level"] == "error" and "ValueError: bad value" in second["exception"]
    assert logs.uses_json_lines() and not logs.show_progress()


class _Clock:
    def __init__(self):
        self.t = 100.0

    def monotonic(self):
        return self.t


def test_rate_limit_filter_one_per_reason_per_interval(buf, monkeypatch):
    clock = _Clock()
    monkeypatch.setattr(logs, "time", types.SimpleNamespace(monotonic=clock.monotonic))
    logs.configure(logging.INFO, json_lines=True, stream=buf)
    log = logging.getLogger("cubecast.test_logs.rate")
    limit = logs.RateLimitFilter(interval_s=1.0)
    log.addFilter(limit)
    try:
        def at(t, reason, text, level=logging.WARNING):
            clock.t = 100.0 + t
            log.log(level, text, extra={"reason": reason} if reason else None)

        at(0.0, "crc", "crc one")
        at(0.2, "crc", "crc two")
        at(0.3, "digest", "digest one")         # another reason has its own interval
        at(0.4, "crc", "crc three")
        at(0.5, None, "no reason")               # records without a reason always pass
        at(1.1, "crc", "crc four")               # the interval is over: passes, standing for two
        at(1.2, "crc", "crc five", logging.ERROR)
        at(1.3, "crc", "crc six", logging.ERROR)
        clock.t = 101.5
        limit.flush(log, prefix="p: ")           # 0.4 s after the last crc record: not due yet
        n_before = len(buf.getvalue().splitlines())
        clock.t = 102.2
        limit.flush(log, prefix="p: ")           # due: a summary of the two held back
        at(2.3, "crc", "crc seven")
        at(2.4, "digest", "digest two")          # 2.1 s after the last digest record: passes
        limit.flush(log, force=True)             # at shutdown: whatever is pending
        limit.flush(log, force=True)             # nothing left
    finally:
        log.removeFilter(limit)
    docs = [json.loads(line) for line in buf.getvalue().splitlines()]
    assert [d["message"] for d in docs] == [
        "crc one",
        "digest one",
        "no reason",
        "crc four (and 2 more since the last report)",
        "p: crc: 2 more in the last 1 s; latest: crc six",
        "digest two",
        "crc: 1 more in the last 1 s; latest: crc seven",
    ]
    assert n_before == 4
    assert "suppressed" not in docs[0] and docs[3]["suppressed"] == 2 and docs[3]["reason"] == "crc"
    assert docs[4]["suppressed"] == 2 and docs[4]["level"] == "error" and docs[4]["summary"] is True
    assert docs[6]["suppressed"] == 1 and docs[6]["level"] == "warning"
    assert "suppressed" not in docs[5]
