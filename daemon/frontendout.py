"""The front end's monitor of a whole run (`cubecast process`, `cubecast record`): the warnings of every
frame summed up per channel (frontendwarn.FrontendSummary) and logged at the end, and on request a CSV
with one row per frame and receive channel (`--frontend-out FILE.csv`), written under a temporary name
and renamed into place when complete (as the point files are).

CSV (README "Front-end monitor"): UTF-8, LF line ends, a header line, no quotes; columns `frame`,
`timestamp_s`, `rx`, then the record fields of wire.FRONTEND_WIRE_FIELDS in order, then `warnings` (the
causes of that channel's warnings in that frame, separated by `;`, empty for none). Integers in decimal,
`timestamp_s` as printf("%.6f"), the other numbers as printf("%.6g") (`nan`, `-inf` where not finite).
"""

from __future__ import annotations

import logging
import os
import secrets
from pathlib import Path

import numpy as np

from .errors import CubecastError
from .frontendwarn import FrontendSummary, FrontendWarning, frontend_warnings
from .wire import FRONTEND_WIRE_FIELDS

log = logging.getLogger(__name__)

CSV_COLUMNS = ("frame", "timestamp_s", "rx") + tuple(name for name, _, _ in FRONTEND_WIRE_FIELDS) + ("warnings",)


def _g(value: float) -> str:
    return "%.6g" % value


def csv_rows(seq: int, timestamp_s: float, records: np.ndarray, warnings: list[FrontendWarning]) -> str:
    """The CSV lines of one frame: a row per receive channel."""
    causes: dict[int, list[str]] = {}
    for w in warnings:
        causes.setdefault(w.rx, []).append(w.cause)
    lines = []
    for rx in range(records.shape[0]):
        r = records[rx]
        values = [str(int(r[name])) if dtype == "<u4" else _g(float(r[name]))
                  for name, _, dtype in FRONTEND_WIRE_FIELDS]
        lines.append(",".join([str(int(seq)), "%.6f" % timestamp_s, str(rx), *values, ";".join(causes.get(rx, []))]))
    return "".join(line + "\n" for line in lines)


class FrontendRun:
    """Per frame `add(seq, timestamp_s, records)` (the Pipeline's `frontend` after processing it);
    `close()` renames the CSV into place and `log_summary(prefix)` logs the run's summary."""

    def __init__(self, n_rx: int, full_scale: float, csv_path: str | Path | None = None):
        self.full_scale = float(full_scale)
        self.summary = FrontendSummary(n_rx)
        self.path = Path(csv_path) if csv_path is not None else None
        self._f = None
        self._tmp: Path | None = None
        if self.path is not None:
            self._tmp = self.path.with_name(f".{self.path.name}.{secrets.token_hex(4)}.part")
            try:
                self._f = open(self._tmp, "w", encoding="utf-8", newline="\n")
                self._f.write(",".join(CSV_COLUMNS) + "\n")
            except OSError as exc:
                raise CubecastError(f"--frontend-out {self.path}: cannot write: {exc.strerror or exc}") from None

    def add(self, seq: int, timestamp_s: float, records: np.ndarray) -> list[FrontendWarning]:
        warnings = frontend_warnings(records, self.full_scale)
        self.summary.add(records, warnings)
        if self._f is not None:
            try:
                self._f.write(csv_rows(seq, timestamp_s, records, warnings))
            except OSError as exc:
                self.abort()
                raise CubecastError(f"--frontend-out {self.path}: cannot write: {exc.strerror or exc}") from None
        return warnings

    def close(self) -> None:
        if self._f is None:
            return
        try:
            self._f.close()
            os.replace(self._tmp, self.path)
        except OSError as exc:
            self.abort()
            raise CubecastError(f"--frontend-out {self.path}: cannot write: {exc.strerror or exc}") from None
        self._f = None

    def abort(self) -> None:
        """Remove what was written (a failed run leaves no half file)."""
        if self._f is not None:
            self._f.close()
            self._f = None
        if self._tmp is not None:
            self._tmp.unlink(missing_ok=True)

    def __enter__(self) -> "FrontendRun":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()

    def summary_lines(self) -> list[str]:
        """The run's summary as plain lines: one per channel, then the frames with warnings by cause."""
        s = self.summary
        if not s.frames:
            return ["front end: no frames"]
        c = s.channels()

        def num(v, fmt: str) -> str:
            return "–" if v is None else fmt.format(v)

        lines = []
        for rx in range(s.n_rx):
            lines.append(
                f"front end rx {rx}: {s.frames} frames, clipped max {num(c['clipped_percent_max'][rx], '{:.3g}')} % "
                f"mean {num(c['clipped_percent_mean'][rx], '{:.3g}')} %, interference bursts "
                f"{c['interference_bursts_total'][rx]} (max {c['interference_bursts_max'][rx]} a frame), share max "
                f"{num(c['interference_share_percent_max'][rx], '{:.3g}')} % mean "
                f"{num(c['interference_share_percent_mean'][rx], '{:.3g}')} %, floor mean "
                f"{num(c['noise_floor_db_mean'][rx], '{:.1f}')} dB max {num(c['noise_floor_db_max'][rx], '{:.1f}')}"
                f" dB, DC max {num(c['dc_offset_counts_max'][rx], '{:.1f}')} counts, IRR min "
                f"{num(c['image_rejection_db_min'][rx], '{:.1f}')} dB")
        kinds = ", ".join(f"{cause} {n}" for cause, n in s.by_cause.items() if n)
        lines.append(f"front end: {s.frames_with_warnings} of {s.frames} frames with warnings"
                     + (f" ({kinds})" if kinds else ""))
        return lines

    def log_summary(self, logger: logging.Logger = log, prefix: str = "") -> None:
        """The summary lines at INFO through `logger` (the command's), the warnings line at WARNING when
        any frame warned."""
        lines = self.summary_lines()
        for line in lines[:-1]:
            logger.info("%s%s", prefix, line)
        logger.log(logging.WARNING if self.summary.frames_with_warnings else logging.INFO, "%s%s", prefix,
                   lines[-1])
