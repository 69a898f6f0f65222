"""The front end's per-channel panel as vispy visuals (the canvas places it; frontendpanel.py says what
it holds): a box, a title, the rx names, the cells and the warnings' sentences, each cell a warning
names in the warning colour and the box's border too."""

from __future__ import annotations

import numpy as np
from vispy import scene

from . import views as V

FONT = "OpenSans"
COLUMNS_PX = (10, 104, 150, 204, 262, 304, 356)  # from the box's left: the rx names' left edge, the cells' right
ROW_PX = 17
NOTE_PX = 14


class FrontendBox:
    def __init__(self, parent, text):
        """parent: the overlay widget; text: the canvas' Text factory (its shared glyph atlas)."""
        self.box = scene.visuals.Rectangle(center=(0, 0), width=10, height=10, color=(0.04, 0.05, 0.07, 0.92),
                                           border_color=V.FOV_EDGE, parent=parent)
        self.title = text("", parent=parent, color=V.TEXT, font_size=9.5, bold=True, face=FONT,
                          anchor_x="left", anchor_y="center")
        self.names = text("", parent=parent, color=V.TEXT, font_size=9, face=FONT, anchor_x="left",
                          anchor_y="center")
        self.cells = text("", parent=parent, color=V.TEXT, font_size=9, face=FONT, anchor_x="right",
                          anchor_y="center")
        self.notes = text("", parent=parent, color=V.STATUS_WAIT, font_size=8.5, face=FONT, anchor_x="left",
                          anchor_y="center")
        self.visuals = (self.box, self.title, self.names, self.cells, self.notes)
        self.show(None, 0, 0)

    @property
    def visible(self) -> bool:
        return bool(self.box.visible)

    def show(self, pt, right: float, top: float) -> tuple[float, float, float, float] | None:
        """Draw `pt` (a frontendpanel.PanelText; None hides the box) with its upper right corner at
        (right, top) in canvas pixels; returns the box as (left, top, width, height), also kept in
        `rect` (None while hidden)."""
        for v in self.visuals:
            v.visible = pt is not None
        self.rect = None
        if pt is None:
            return None
        w = COLUMNS_PX[-1] + 14
        n_rows = len(pt.rows)
        h = 30 + ROW_PX * (n_rows - 1) + 18 + (NOTE_PX * len(pt.notes) + 6 if pt.notes else 0)
        left = right - w
        warned = any(any(r) for r in pt.warn)
        self.box.center = (left + w / 2, top + h / 2)
        self.box.width, self.box.height = w, h
        self.box.border_color = V.STATUS_STALL if warned else V.FOV_EDGE
        self.title.text, self.title.pos = pt.title, (left + 10, top + 14)
        ys = [top + 34 + ROW_PX * k for k in range(n_rows)]
        self.names.text = [r[0] for r in pt.rows]
        self.names.pos = np.array([[left + COLUMNS_PX[0], y] for y in ys], np.float32)
        self.names.color = np.array([V.TEXT_DIM] + [V.STATUS_STALL if f[0] else V.TEXT for f in pt.warn[1:]],
                                    np.float32)
        cells, pos, colors = [], [], []
        for k, (row, flags) in enumerate(zip(pt.rows, pt.warn)):
            for c in range(1, len(row)):
                cells.append(row[c])
                pos.append([left + COLUMNS_PX[c], ys[k]])
                colors.append(V.TEXT_DIM if k == 0 else (V.STATUS_STALL if flags[c] else V.TEXT))
        self.cells.text = cells
        self.cells.pos = np.array(pos, np.float32)
        self.cells.color = np.array(colors, np.float32)
        notes = pt.notes or [""]
        self.notes.text = notes
        y0 = ys[-1] + ROW_PX + 4
        self.notes.pos = np.array([[left + 10, y0 + NOTE_PX * k] for k in range(len(notes))], np.float32)
        self.notes.visible = bool(pt.notes)
        self.rect = (left, top, w, h)
        return self.rect
