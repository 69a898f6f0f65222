"""Progress of a long-running command on standard error: a tqdm bar when a person watches (a terminal),
else one log line a second through logging (so -q silences it and --log-json makes it a JSON line
with the counts as fields)."""

from __future__ import annotations

import logging
import sys
import time


class Progress:
    """Counters (name -> count, in the order given; the first one drives the bar) reported at most once
    every `interval_s`. Call update() as often as convenient; it costs a clock read when nothing is due.

    bar: draw a tqdm bar on `stream` (default standard error) instead of log lines; `total` is the
    first counter's target, if any. clock: seconds, monotonic (a test's clock)."""

    def __init__(self, prefix: str, names: tuple[str, ...], *, logger: logging.Logger, bar: bool = False,
                 total: int | None = None, interval_s: float = 1.0, clock=time.monotonic, stream=None):
        self.prefix, self.names, self.log, self.interval_s, self.clock = prefix, names, logger, interval_s, clock
        self.counts = dict.fromkeys(names, 0)
        self._last_t = clock()
        self._last_counts = dict(self.counts)
        self._bar = None
        if bar:
            from tqdm import tqdm
            self._bar = tqdm(total=total or None, desc=prefix, unit=names[0].rstrip("s"),
                             file=stream if stream is not None else sys.stderr, mininterval=interval_s)

    def update(self, **counts: int) -> None:
        self.counts.update(counts)
        if self._bar is not None:
            first = self.names[0]
            self._bar.update(self.counts[first] - self._bar.n)
            if len(self.names) > 1:
                self._bar.set_postfix({n: self.counts[n] for n in self.names[1:]}, refresh=False)
            return
        now = self.clock()
        if now - self._last_t >= self.interval_s:
            self._line(now - self._last_t, self._last_counts)
            self._last_t, self._last_counts = now, dict(self.counts)

    def rates(self, seconds: float, since: dict[str, int]) -> dict[str, float]:
        """Per second over `seconds`, from the counts `since` to now."""
        return {n: (self.counts[n] - since[n]) / seconds for n in self.names}

    def _line(self, seconds: float, since: dict[str, int]) -> None:
        rates = self.rates(seconds, since)
        text = ", ".join(f"{self.counts[n]} {n} ({rates[n]:.1f}/s)" for n in self.names)
        self.log.info("%s: written %s", self.prefix, text,
                      extra={"progress": True, **{n.replace(" ", "_"): self.counts[n] for n in self.names}})

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None
