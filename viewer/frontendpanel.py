"""The front end's monitor in the viewer: the status line's flag and the per-channel panel (key m),
from the latest `frontend` message (README "Wire format"). Pure: a decoded message in, text out.

The warnings' words come on the wire (serve's daemon/frontendwarn.py makes them); here they are only
placed: the flag is the first warning's short text, the panel highlights each cell whose figure a
warning names.
"""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass

COLUMNS = ("rx", "clipped %", "bursts", "share %", "floor dB", "DC", "IRR dB")
# which cells a warning's cause highlights (by column index)
CAUSE_COLUMNS = {"clipping": (1,), "interference": (2, 3), "dc_offset": (5,), "image_rejection": (6,),
                 "noise_floor_high": (4,), "noise_floor_low": (4,), "no_signal": (4,)}
NO_VALUE = "–"


def percent_text(value: float) -> str:
    """0, then two significant figures at most: 13, 1.3, 0.13, 0.013."""
    if not math.isfinite(value):
        return NO_VALUE
    if value == 0:
        return "0"
    if value >= 10:
        return f"{value:.0f}"
    if value >= 1:
        return f"{value:.1f}"
    return f"{value:.2g}"


def _number(value: float, digits: int) -> str:
    return f"{value:.{digits}f}" if math.isfinite(value) else NO_VALUE


def warnings_of(msg: dict | None) -> list[dict]:
    return list(msg["header"]["warnings"]) if msg is not None else []


def flag_text(msg: dict | None) -> str | None:
    """The status line's flag: the first warning's short text ("rx 2 clipping 1.3 %"), and how many
    more there are; None without warnings."""
    warnings = warnings_of(msg)
    if not warnings:
        return None
    more = msg["header"]["warnings_total"] - 1
    return warnings[0]["short"] + (f" (+{more} more)" if more > 0 else "")


@dataclass(frozen=True)
class PanelText:
    """The panel: a title line, the column heads, a row of cells per receive channel and, per cell,
    whether a warning names it; below, the sentence of the first warning of each cause."""

    title: str
    rows: list[list[str]]
    warn: list[list[bool]]
    notes: list[str]


def panel_text(msg: dict | None, max_notes: int = 3, wrap_chars: int = 70) -> PanelText:
    """What the per-channel panel shows for the latest `frontend` message (or that none came yet)."""
    if msg is None:
        return PanelText("FRONT END · no monitor yet (serve sends one per frame)", [list(COLUMNS)],
                         [[False] * len(COLUMNS)], [])
    data, h = msg["data"], msg["header"]
    warnings = warnings_of(msg)
    rows, warn = [list(COLUMNS)], [[False] * len(COLUMNS)]
    for rx in range(len(data)):
        r = data[rx]
        samples = float(r["samples"])
        clipped = 100.0 * float(r["clipped_samples"]) / samples if samples > 0 else math.nan
        share = 100.0 * float(r["interference_samples"]) / samples if samples > 0 else math.nan
        rows.append([f"rx {rx}", percent_text(clipped), str(int(r["interference_bursts"])), percent_text(share),
                     _number(float(r["noise_floor_db"]), 1), _number(float(r["dc_offset_counts"]), 0),
                     _number(float(r["image_rejection_db"]), 1)])
        flags = [False] * len(COLUMNS)
        for w in warnings:
            if w["rx"] == rx:
                flags[0] = True
                for c in CAUSE_COLUMNS.get(w["cause"], ()):
                    flags[c] = True
        warn.append(flags)
    total = h["warnings_total"]
    title = f"FRONT END · frame {h['seq']} · " + (f"{total} warning{'s' if total != 1 else ''}" if total
                                                    else "no warnings")
    shown = []  # the first warning of each cause, so that one cause on every channel takes one line
    for w in warnings:
        if w["cause"] not in {x["cause"] for x in shown} and len(shown) < max_notes:
            shown.append(w)
    notes = [line for w in shown for line in textwrap.wrap(w["text"], wrap_chars, subsequent_indent="  ")]
    if total > len(shown):
        notes.append(f"... and {total - len(shown)} more (the cells in colour)")
    return PanelText(title, rows, warn, notes)
