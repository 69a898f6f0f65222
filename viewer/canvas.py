"""The viewer's SceneCanvas: a header, three panels on a grid, legends, a footer and a help overlay.

Used by the window (app.py) and by the offscreen renderer (snapshot.py) alike, so that a snapshot
looks exactly like the window. Import only after a vispy app backend has been chosen.
`ViewerCanvas.show_state(state)` makes one set_data per visual from a views.ViewerState.
"""

from __future__ import annotations

import numpy as np
from vispy import scene
from vispy.visuals.text.text import FontManager
from vispy.visuals.transforms import STTransform

from . import views as V
from .frontendbox import FrontendBox
from .frontendpanel import panel_text

FONT = "OpenSans"   # shipped with vispy: the same glyphs on every machine
HEADER_H, FOOTER_H, TITLE_H, XAXIS_H, YAXIS_W, MARGIN = 34, 24, 34, 42, 60, 8


def _num(v: float) -> str:
    return f"{v:.0f}" if abs(v - round(v)) < 0.05 else f"{v:.1f}"


def _mesh_fan(poly: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Triangles of a polygon that is star-shaped around its first vertex."""
    v = np.zeros((len(poly), 3), np.float32)
    v[:, :2] = poly
    i = np.arange(1, len(poly) - 1)
    faces = np.stack([np.zeros_like(i), i, i + 1], 1).astype(np.uint32)
    return v, faces


def _quad(poly: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    v = np.zeros((4, 3), np.float32)
    v[:, :2] = poly
    return v, np.array([[0, 1, 2], [0, 2, 3]], np.uint32)


def share_fonts(axis_widget, fonts) -> None:
    """Point an axis' tick and label texts at a canvas' glyph atlas (vispy builds its own)."""
    for name in ("_text", "_axis_label_vis"):
        t = getattr(axis_widget.axis, name, None)
        if t is not None and hasattr(t, "_font_manager"):
            t._font_manager = fonts
            t._update_font()


def make_panel(grid, row: int, x_label: str, y_label: str, aspect, fonts):
    """A plot in `grid`: a view at (row, 1) with a pan-zoom camera, its y axis at (row, 0) and its x
    axis at (row + 1, 1), both labelled and linked. Returns (view, x axis, y axis)."""
    view = grid.add_view(row=row, col=1, bgcolor=V.PANEL_BG, border_color=V.GRID)
    view.camera = scene.PanZoomCamera(aspect=aspect)   # before linking: the axes follow its transform
    common = dict(text_color=V.TEXT_DIM, axis_color=V.GRID, tick_color=V.GRID, tick_font_size=8,
                  axis_font_size=9.5, tick_label_margin=6, major_tick_length=5, minor_tick_length=2,
                  axis_width=1, tick_width=1)
    ya = scene.AxisWidget(orientation="left", axis_label=y_label, axis_label_margin=38, **common)
    ya.width_min = ya.width_max = YAXIS_W
    grid.add_widget(ya, row=row, col=0)
    xa = scene.AxisWidget(orientation="bottom", axis_label=x_label, axis_label_margin=30, **common)
    xa.height_min = xa.height_max = XAXIS_H
    grid.add_widget(xa, row=row + 1, col=1)
    share_fonts(ya, fonts)
    share_fonts(xa, fonts)
    ya.link_view(view)
    xa.link_view(view)
    view.stretch = (1, 1)
    return view, xa, ya


def refresh_linked_axes(axes) -> bool:
    """Bring linked axes' number ranges up to date with their views (vispy's linked axes miss a
    change of their own place in the layout); True when any changed."""
    changed = False
    for ax in axes:
        tr = ax.node_transform(ax._linked_view.scene)
        p1, p2 = tr.map(ax._axis_ends())
        dom = (p1[1], p2[1]) if ax.orientation in ("left", "right") else (p1[0], p2[0])
        if not np.allclose(dom, ax.axis.domain, rtol=0, atol=1e-9):
            ax.axis.domain = dom
            changed = True
    return changed


class Legend:
    """A horizontal colour bar with words at its ends and tick labels under it, in a widget's pixels."""

    def __init__(self, parent, kind: str, fonts, font_size: float = 8.5):
        self.kind = kind
        self._text = lambda *a, **k: scene.visuals.Text(*a, font_manager=fonts, **k)
        self.bar = scene.visuals.Image(V.colorbar_rgba(kind), parent=parent, interpolation="linear")
        self.frame = scene.visuals.Line(parent=parent, color=V.GRID, width=1, connect="strip", method="gl")
        self.left = self._text("", parent=parent, color=V.TEXT_DIM, font_size=font_size, face=FONT,
                               anchor_x="right", anchor_y="center")
        self.right = self._text("", parent=parent, color=V.TEXT_DIM, font_size=font_size, face=FONT,
                                anchor_x="left", anchor_y="center")
        self.ticks = self._text("", parent=parent, color=V.TEXT_DIM, font_size=font_size - 0.5,
                                face=FONT, anchor_x="center", anchor_y="bottom")
        self.tick_lines = scene.visuals.Line(parent=parent, color=V.TEXT_DIM, width=1, connect="segments",
                                             method="gl")
        self._last = None

    def set_visible(self, visible: bool) -> None:
        for v in (self.bar, self.frame, self.left, self.right, self.ticks, self.tick_lines):
            v.visible = visible

    def set(self, kind: str, left: str, right: str, ticks, x0: float, y0: float, width: float,
            height: float) -> None:
        key = (kind, left, right, tuple(ticks), x0, y0, width, height)
        if key == self._last:
            return
        self._last = key
        if kind != self.kind:
            self.kind = kind
            self.bar.set_data(V.colorbar_rgba(kind))
        n = V.colorbar_rgba(kind).shape[1]
        self.bar.transform = STTransform(scale=(width / n, height), translate=(x0, y0))
        self.frame.set_data(np.array([[x0, y0], [x0 + width, y0], [x0 + width, y0 + height],
                                      [x0, y0 + height], [x0, y0]], np.float32))
        self.left.text, self.left.pos = left, (x0 - 8, y0 + height / 2)
        self.right.text, self.right.pos = right, (x0 + width + 8, y0 + height / 2)
        self.ticks.text = [t for _, t in ticks]
        self.ticks.pos = np.array([[x0 + f * width, y0 + height + 4] for f, _ in ticks], np.float32)
        segs = np.array([[[x0 + f * width, y0 + height], [x0 + f * width, y0 + height + 3]] for f, _ in ticks],
                        np.float32).reshape(-1, 2)
        self.tick_lines.set_data(segs)


class ViewerCanvas:
    """The canvas and its visuals. `show=False` with an offscreen backend renders without a display."""

    def __init__(self, size=(1280, 800), show: bool = False, title: str = "cubecast view", dpi=None):
        # one glyph atlas for every text on the canvas: each vispy Text otherwise rasterises its own
        self.fonts = FontManager(method="cpu")
        self.canvas = scene.SceneCanvas(size=size, show=show, bgcolor=V.BACKGROUND, title=title, keys=None,
                                        dpi=dpi)
        c = self.canvas
        self._geometry_key = None
        self._rd_key = None
        self._axes: list = []

        grid = c.central_widget.add_grid(spacing=0, margin=8)
        self.header = grid.add_widget(row=0, col=0, col_span=2)
        self.header.height_min = self.header.height_max = HEADER_H
        left = grid.add_grid(row=1, col=0)
        right = grid.add_grid(row=1, col=1)
        self.right = right
        self.footer = grid.add_widget(row=2, col=0, col_span=2)
        self.footer.height_min = self.footer.height_max = FOOTER_H
        self._build_header_footer()
        self._build_top(left)
        self._build_side(left)
        self._build_rd(right)
        self._set_draw_order()
        self._build_help()
        self.canvas.events.resize.connect(lambda ev: self._layout_overlays())
        self._layout_overlays()

    # ---- construction, panel by panel ----
    def _build_header_footer(self) -> None:
        """Header: title on the left, status on the right of it; footer: notes left and right."""
        self.title = self._text("cubecast", parent=self.header, color=V.TEXT, font_size=13, face=FONT,
                                bold=True, anchor_x="left", anchor_y="center", pos=(6, 17))
        self.status = self._text("", parent=self.header, color=V.STATUS_WAIT, font_size=10, face=FONT,
                                 anchor_x="left", anchor_y="center", pos=(118, 17))
        self.footer_text = self._text("", parent=self.footer, color=V.TEXT_DIM, font_size=8.5,
                                      face=FONT, anchor_x="left", anchor_y="center", pos=(6, 12))
        self.footer_right = self._text("", parent=self.footer, color=V.TEXT_DIM, font_size=8.5,
                                       face=FONT, anchor_x="right", anchor_y="center", pos=(1200, 12))

    def _build_top(self, left) -> None:
        """Top view (bird's-eye)."""
        self.top_title = left.add_widget(row=0, col=0, col_span=2)
        self.top_title.height_min = self.top_title.height_max = TITLE_H
        self.top = self._panel(left, 1, "x across, right positive (m)", "y forward (m)", 1.0)
        _, self.top_sub = self._panel_title(self.top_title, "TOP VIEW", "bird's-eye · x across, y forward")
        self.top_legend = Legend(self.top_title, "velocity", self.fonts)
        self.fov_fill = scene.visuals.Mesh(parent=self.top.scene, color=V.FOV_FILL)
        self.rings = scene.visuals.Line(parent=self.top.scene, color=V.GRID, width=1, connect="segments",
                                        method="gl", antialias=True)
        self.bearings = scene.visuals.Line(parent=self.top.scene, color=V.GRID, width=1, connect="segments",
                                           method="gl", antialias=True)
        self.fov_line = scene.visuals.Line(parent=self.top.scene, color=V.FOV_EDGE, width=1.6,
                                           connect="strip", method="agg")
        self.ring_labels = self._text("", parent=self.top.scene, color=V.GRID_LABEL, font_size=8.5,
                                      face=FONT)
        self.bearing_labels = self._text("", parent=self.top.scene, color=V.GRID_LABEL, font_size=8.5,
                                         face=FONT)
        self.top_sensor = scene.visuals.Markers(parent=self.top.scene)
        self.top_points = scene.visuals.Markers(parent=self.top.scene, antialias=1)
        # the platform picture: a Cartesian grid, each sensor's field of view and name in its hue
        self.plat_grid = scene.visuals.Line(parent=self.top.scene, color=V.GRID, width=1, connect="segments",
                                            method="gl", antialias=True)
        self.plat_fov = scene.visuals.Line(parent=self.top.scene, width=1.6, connect="segments", method="gl",
                                           antialias=True)
        self.plat_labels = self._text("", parent=self.top.scene, color=V.TEXT, font_size=9, face=FONT,
                                      anchor_x="left", anchor_y="center")

    def _build_side(self, left) -> None:
        """Side view (elevation)."""
        self.side_title = left.add_widget(row=3, col=0, col_span=2)
        self.side_title.height_min = self.side_title.height_max = TITLE_H
        self.side = self._panel(left, 4, "y forward (m)", "z height (m)", 1.0)
        _, self.side_sub = self._panel_title(self.side_title, "SIDE VIEW",
                                             "forward distance against height · sensor at z = 0")
        self.ground_fill = scene.visuals.Mesh(parent=self.side.scene, color=V.GROUND_FILL)
        self.side_fov = scene.visuals.Line(parent=self.side.scene, color=V.FOV_EDGE, width=1.2,
                                           connect="segments", method="gl", antialias=True)
        self.side_grid = scene.visuals.Line(parent=self.side.scene, color=V.GRID, width=1, connect="segments",
                                            method="gl")
        self.sensor_line = scene.visuals.Line(parent=self.side.scene, color=V.SENSOR_LINE, width=1,
                                              connect="segments", method="gl")
        self.ground_line = scene.visuals.Line(parent=self.side.scene, color=V.GROUND, width=1,
                                              connect="strip", method="gl")
        self.side_labels = self._text("", parent=self.side.scene, color=V.GRID_LABEL, font_size=8.5,
                                      face=FONT, anchor_x="right", anchor_y="center")
        self.side_sensor = scene.visuals.Markers(parent=self.side.scene)
        self.side_points = scene.visuals.Markers(parent=self.side.scene, antialias=1)
        self.plat_side_fov = scene.visuals.Line(parent=self.side.scene, width=1.2, connect="segments",
                                                method="gl", antialias=True)
        self._sensor_frame_visuals = (self.fov_fill, self.fov_line, self.rings, self.bearings, self.ring_labels,
                                      self.bearing_labels, self.side_fov, self.sensor_line)
        self._platform_visuals = (self.plat_grid, self.plat_fov, self.plat_labels, self.plat_side_fov)
        for vis in self._platform_visuals:
            vis.visible = False

    def _build_rd(self, right) -> None:
        """Range-Doppler map."""
        self.rd_title = right.add_widget(row=0, col=0, col_span=2)
        self.rd_title.height_min = self.rd_title.height_max = TITLE_H
        self.rd = self._panel(right, 1, "radial velocity before unfolding (m/s)", "range (m)", None)
        self._panel_title(self.rd_title, "RANGE-DOPPLER", "")
        self.rd_legend = Legend(self.rd_title, "map", self.fonts)
        self.rd_image = scene.visuals.Image(np.zeros((1, 1, 4), np.uint8), parent=self.rd.scene,
                                            interpolation="nearest")
        self.rd_image.visible = False
        self.rd_zero = scene.visuals.Line(parent=self.rd.scene, color=(1, 1, 1, 0.25), width=1,
                                          connect="segments", method="gl")
        self.rd_marks = scene.visuals.Markers(parent=self.rd.scene, antialias=1)
        self.rd_empty = self._text("no range-Doppler map yet", parent=self.rd, color=V.TEXT_DIM,
                                   font_size=10, face=FONT, anchor_x="left", anchor_y="center", pos=(14, 18))
        # whose frame the map is, and what its rings are (top left, over the map's far, quiet ranges)
        self.rd_sub = self._text("", parent=self.rd, color=V.TEXT, font_size=8.5, face=FONT, anchor_x="left",
                                 anchor_y="center", pos=(10, 14))

    def _set_draw_order(self) -> None:
        """Draw order inside the panels: fills, grids, labels, points on top."""
        for vis, order in ((self.fov_fill, 0), (self.ground_fill, 0), (self.rd_image, 0), (self.rings, 1),
                           (self.bearings, 1), (self.side_grid, 1), (self.side_fov, 2), (self.fov_line, 2),
                           (self.sensor_line, 2), (self.ground_line, 2), (self.rd_zero, 2),
                           (self.ring_labels, 3), (self.bearing_labels, 3), (self.side_labels, 3),
                           (self.top_sensor, 4), (self.side_sensor, 4), (self.top_points, 5),
                           (self.side_points, 5), (self.rd_marks, 5), (self.plat_grid, 1), (self.plat_fov, 2),
                           (self.plat_side_fov, 2), (self.plat_labels, 3)):
            vis.order = order
        for m in (self.top_points, self.side_points, self.rd_marks, self.top_sensor, self.side_sensor):
            m.set_gl_state("translucent", depth_test=False)
        # everything is flat at z = 0: draw in order, never depth-tested against each other
        for m in (self.fov_fill, self.ground_fill, self.rings, self.bearings, self.fov_line, self.side_fov,
                  self.side_grid, self.sensor_line, self.ground_line, self.rd_zero, self.rd_image, self.plat_grid,
                  self.plat_fov, self.plat_side_fov):
            m.set_gl_state("translucent", depth_test=False)
        self.top_points.visible = self.side_points.visible = self.rd_marks.visible = False

    def _build_help(self) -> None:
        """Help overlay: a panel over everything, hidden until asked for."""
        self.overlay = self.canvas.central_widget.add_widget(scene.Widget())
        self.help_box = scene.visuals.Rectangle(center=(640, 400), width=560, height=330,
                                                color=(0.04, 0.05, 0.07, 0.93), border_color=V.FOV_EDGE,
                                                parent=self.overlay)
        self.help_title = self._text("keys", parent=self.overlay, color=V.TEXT, font_size=12, bold=True,
                                     face=FONT, anchor_x="left", anchor_y="bottom")
        self.help_keys = self._text("", parent=self.overlay, color=V.FOV_EDGE, font_size=10,
                                    face=FONT, anchor_x="left", anchor_y="bottom")
        self.help_desc = self._text("", parent=self.overlay, color=V.TEXT, font_size=10, face=FONT,
                                    anchor_x="left", anchor_y="bottom")
        self.set_help(False)
        # the numbers of a clicked point or map cell, in the lower left of the range-Doppler panel
        self.info_box = scene.visuals.Rectangle(center=(0, 0), width=10, height=10, color=(0.04, 0.05, 0.07, 0.9),
                                                border_color=V.DETECTION_RING, parent=self.overlay)
        self.info_title = self._text("", parent=self.overlay, color=V.TEXT, font_size=9.5, bold=True, face=FONT,
                                     anchor_x="left", anchor_y="center")
        self.info_lines = self._text("", parent=self.overlay, color=V.TEXT, font_size=9, face=FONT,
                                     anchor_x="left", anchor_y="center")
        self.show_selection(None)
        self._build_frontend()

    def _build_frontend(self) -> None:
        """The front end's per-channel panel (key m), in the upper right of the range-Doppler panel."""
        self.frontend_box = FrontendBox(self.overlay, self._text)
        self._frontend_key = self._frontend_state = None

    # ---- construction helpers ----
    def _text(self, *args, **kwargs):
        return scene.visuals.Text(*args, font_manager=self.fonts, **kwargs)

    def _panel(self, grid, row: int, x_label: str, y_label: str, aspect):
        view, xa, ya = make_panel(grid, row, x_label, y_label, aspect, self.fonts)
        self._axes.extend((xa, ya))
        return view

    def _panel_title(self, widget, name: str, sub: str):
        t = self._text(name, parent=widget, color=V.TEXT, font_size=10.5, bold=True, face=FONT,
                       anchor_x="left", anchor_y="center", pos=(YAXIS_W, 14))
        s = self._text(sub, parent=widget, color=V.TEXT_DIM, font_size=8.5, face=FONT,
                       anchor_x="left", anchor_y="center", pos=(YAXIS_W + 12 + 9.2 * len(name), 14.5))
        return t, s

    def _layout_overlays(self) -> None:
        w, h = self.canvas.size
        rows = V.HELP_ROWS
        bw, bh = 600, 40 + 22 * len(rows)
        cx, cy = w / 2, h / 2
        self.help_box.center = (cx, cy)
        self.help_box.width, self.help_box.height = bw, bh
        self.help_title.pos = (cx - bw / 2 + 24, cy - bh / 2 + 14)
        self.help_keys.text = [k for k, _ in rows]
        self.help_desc.text = [d for _, d in rows]
        ys = cy - bh / 2 + 44 + 22 * np.arange(len(rows))
        self.help_keys.pos = np.stack([np.full(len(ys), cx - bw / 2 + 28), ys], 1)
        self.help_desc.pos = np.stack([np.full(len(ys), cx - bw / 2 + 170), ys], 1)
        self.footer_right.pos = (w - 24, 12)
        # vispy's grid solver shares space unevenly: fix the side view's height and the right column's width
        body_h = h - HEADER_H - FOOTER_H - 2 * MARGIN
        side_h = max(100.0, 0.35 * (body_h - 2 * (TITLE_H + XAXIS_H)))
        self.side.height_min = self.side.height_max = side_h
        right_w = max(260.0, 0.37 * (w - 2 * MARGIN))
        self.right.width_min = self.right.width_max = right_w
        self._column_w = (w - 2 * MARGIN - right_w, right_w)
        if getattr(self, "_selection", None):
            self.show_selection(self._selection)
        self._frontend_key = None  # placed again at the next show_frontend

    def set_help(self, visible: bool) -> None:
        for v in (self.help_box, self.help_title, self.help_keys, self.help_desc):
            v.visible = visible

    def show_selection(self, lines: list[str] | None) -> None:
        """Show the lines of a clicked point or cell (the first is the title), or hide the panel."""
        self._selection = lines
        for v in (self.info_box, self.info_title, self.info_lines):
            v.visible = bool(lines)
        if not lines:
            return
        x0, _, x1, y1 = self.panel_rect("rd")
        w = min(max(x1 - x0 - 16, 200), 420)
        h = 30 + 17 * (len(lines) - 1)
        left, top = x0 + 8, y1 - 8 - h
        self.info_box.center = (left + w / 2, top + h / 2)
        self.info_box.width, self.info_box.height = w, h
        self.info_title.text, self.info_title.pos = lines[0], (left + 10, top + 14)
        rest = lines[1:] or [""]
        self.info_lines.text = rest
        self.info_lines.pos = np.array([[left + 10, top + 31 + 17 * k] for k in range(len(rest))], np.float32)

    @property
    def selection(self) -> list[str] | None:
        return self._selection

    def show_frontend(self, state: V.ViewerState) -> None:
        """The per-channel panel from the latest `frontend` message, when state.show_frontend."""
        self._frontend_state = state
        pt = panel_text(state.frontend_msg) if state.show_frontend else None
        x0, y0, x1, _ = self.panel_rect("rd")
        key = (pt, x0, y0, x1)
        if key != self._frontend_key:
            self._frontend_key = key
            self.frontend_box.show(pt, x1 - 8, y0 + 26)

    def pick(self, state: V.ViewerState, px) -> list[str] | None:
        """The lines a click at canvas pixel `px` (physical pixels, as data_to_pixel) shows: the nearest
        drawn point within 10 px in the top or side view, the nearest ring or else the cell under the
        click on the range-Doppler map; None for empty space."""
        px = np.asarray(px, np.float64)
        for panel in ("top", "side"):
            x0, y0, x1, y1 = self.panel_rect(panel)
            if not (x0 <= px[0] <= x1 and y0 <= px[1] <= y1):
                continue
            clouds = [(sid, seq, pts) for sid, persist in state.clouds_by_sensor() for seq, pts in persist.clouds()]
            if not any(len(pts) for _, _, pts in clouds):
                return None
            seqs = np.concatenate([np.full(len(pts), -1 if seq is None else seq) for _, seq, pts in clouds])
            sids = [sid for sid, _, pts in clouds for _ in range(len(pts))]
            pts = np.concatenate([pts for _, _, pts in clouds])
            xy = V.bev_positions(pts, state.frame) if panel == "top" else V.side_positions(pts, state.frame)
            k = V.nearest_pixel(self.data_to_pixel(panel, xy), px)
            if k is None:
                return None
            return V.point_lines(pts[k], None if seqs[k] < 0 else int(seqs[k]),
                                 sids[k] if state.frame == "platform" else None)
        x0, y0, x1, y1 = self.panel_rect("rd")
        rd = state.rdmap_msg
        if rd is None or not (x0 <= px[0] <= x1 and y0 <= px[1] <= y1):
            return None
        own = state.map_points()
        if own is not None and len(own):
            k = V.nearest_pixel(self.data_to_pixel("rd", V.rd_marks(own, rd["header"], rd["data"].shape[1])), px)
            if k is not None:
                return V.point_lines(own[k], rd["header"]["seq"])
        v, r = self.pixel_to_data("rd", px)
        cell = V.rd_cell_at(rd["header"], rd["data"].shape, v, r)
        return None if cell is None else V.cell_lines(rd, cell, own)

    @property
    def help_visible(self) -> bool:
        return bool(self.help_box.visible)

    # ---- updates ----
    def reset_cameras(self, state: V.ViewerState) -> None:
        self._geometry_key = None
        self._rd_key = None
        self._apply_geometry(state, force=True)
        if state.rdmap_msg is not None:
            self._apply_rd_geometry(state.rdmap_msg, force=True)

    def _apply_geometry(self, state: V.ViewerState, force: bool = False) -> None:
        if state.frame == "platform":
            self._apply_platform_geometry(state, force)
            return
        s = state.summary
        known = state.sensor_msg is not None
        key = (s["max_range_m"], s["fov_half_azimuth_deg"], s["fov_half_elevation_deg"], state.ground_height_m, known)
        if key == self._geometry_key and not force:
            return
        self._geometry_key = key
        for vis in self._platform_visuals:
            vis.visible = False
        for vis in self._sensor_frame_visuals:
            vis.visible = True
        self.top_sensor.visible = self.side_sensor.visible = True
        self.side_sub.text = "forward distance against height · sensor at z = 0"
        tg = V.top_grid(s["max_range_m"], s["fov_half_azimuth_deg"])
        self.rings.set_data(tg.rings)
        self.bearings.set_data(tg.bearings)
        self.fov_line.set_data(tg.fov_outline)
        verts, faces = _mesh_fan(tg.fov_outline[:-1])
        self.fov_fill.set_data(vertices=verts, faces=faces, color=V.FOV_FILL)
        ring = [lab for lab in tg.labels if lab.text.endswith(" m")]
        bear = [lab for lab in tg.labels if not lab.text.endswith(" m")]
        self.ring_labels.text = [lab.text for lab in ring]
        self.ring_labels.pos = np.array([lab.pos for lab in ring], np.float32)
        self.bearing_labels.text = [lab.text for lab in bear]
        self.bearing_labels.pos = np.array([lab.pos for lab in bear], np.float32)
        self.top_sensor.set_data(np.zeros((1, 2), np.float32), face_color=V.SENSOR_MARK, edge_color=V.BACKGROUND,
                                 size=11, symbol="triangle_up", edge_width=1)
        self.top.camera.rect = tg.extent
        self.top_sub.text = (f"bird's-eye, field ±{_num(s['fov_half_azimuth_deg'])}° to {_num(s['max_range_m'])} m"
                             if known else "bird's-eye · no sensor description yet")
        # the field of view is the sensor's: drawn only once its description has come
        for vis in (self.fov_fill, self.fov_line, self.side_fov):
            vis.visible = known
        if state.rdmap_msg is None:
            v = float(s["max_velocity_mps"])
            self.rd.camera.rect = (-v, 0.0, 2 * v, float(s["max_range_m"]))

        sg = V.side_grid(s["max_range_m"], s["fov_half_elevation_deg"], state.ground_height_m)
        self.ground_line.set_data(sg.ground)
        verts, faces = _quad(sg.ground_fill)
        self.ground_fill.set_data(vertices=verts, faces=faces, color=V.GROUND_FILL)
        self.sensor_line.set_data(sg.sensor_line)
        self.side_fov.set_data(sg.fov_edges)
        # faint height grid every metre
        y0, z0, w, h = sg.extent
        zs = np.arange(np.ceil(z0), z0 + h, 1.0)
        zs = zs[np.abs(zs) > 1e-6]
        zs = zs[zs > -state.ground_height_m + 1e-6]
        g = np.zeros((2 * len(zs), 2), np.float32)
        g[0::2, 0], g[1::2, 0] = 0.0, s["max_range_m"] * 1.02
        g[0::2, 1] = g[1::2, 1] = np.repeat(zs, 1)
        self.side_grid.set_data(g if len(g) else np.zeros((2, 2), np.float32))
        self.side_grid.visible = bool(len(g))
        self.side_labels.text = [lab.text for lab in sg.labels]
        self.side_labels.pos = np.array([lab.pos for lab in sg.labels], np.float32)
        self.side_sensor.set_data(np.zeros((1, 2), np.float32), face_color=V.SENSOR_MARK, edge_color=V.BACKGROUND,
                                  size=11, symbol="triangle_up", edge_width=1)
        self.side.camera.rect = sg.extent

    def _apply_platform_geometry(self, state: V.ViewerState, force: bool = False) -> None:
        """The platform picture's grid, the sensors' fields of view, marks and names."""
        places = state.places()
        ground_z = state.platform_ground_z_m
        key = ("platform", ground_z, tuple((p.sensor_id, p.rgb, tuple(p.position_m), tuple(p.rotation.ravel()),
                                            p.max_range_m, p.fov_half_azimuth_deg, p.fov_half_elevation_deg)
                                           for p in places))
        if key == self._geometry_key and not force:
            return
        self._geometry_key = key
        pg = V.platform_grid(places, ground_z)
        for vis in self._sensor_frame_visuals:
            vis.visible = False
        self.plat_grid.set_data(pg.grid)
        self.plat_grid.visible = True
        if places:
            fov = np.concatenate(pg.wedges)
            col = np.concatenate([np.tile((*p.rgb, 0.85), (len(w), 1)) for p, w in zip(places, pg.wedges)])
            self.plat_fov.set_data(fov, color=col.astype(np.float32))
            side = np.concatenate(pg.side_edges)
            scol = np.concatenate([np.tile((*p.rgb, 0.85), (len(e), 1)) for p, e in zip(places, pg.side_edges)])
            self.plat_side_fov.set_data(side, color=scol.astype(np.float32))
            faces = np.array([(*p.rgb, 1.0) for p in places], np.float32)
            self.top_sensor.set_data(pg.marks_top, face_color=faces, edge_color=V.BACKGROUND, size=11,
                                     symbol="square", edge_width=1)
            self.side_sensor.set_data(pg.marks_side, face_color=faces, edge_color=V.BACKGROUND, size=11,
                                      symbol="square", edge_width=1)
            self.plat_labels.text = [lab.text for lab in pg.labels_top]
            self.plat_labels.pos = np.array([lab.pos for lab in pg.labels_top], np.float32)
            self.plat_labels.color = faces
        for vis in (self.plat_fov, self.plat_side_fov, self.plat_labels):
            vis.visible = bool(places)
        self.top_sensor.visible = self.side_sensor.visible = bool(places)
        self.top.camera.rect = pg.extent_top
        names = ", ".join(p.sensor_id for p in places) or "no sensor description yet"
        self.top_sub.text = f"platform frame · grid {V._fmt_num(pg.step_m)} m" if places else f"platform frame · {names}"
        self.side_sub.text = "platform frame · forward distance against height"
        y0, z0, w, h = pg.extent_side
        self.ground_line.set_data(np.array([[y0, ground_z], [y0 + w, ground_z]], np.float32))
        depth = ground_z - z0
        verts, faces_ = _quad(np.array([[y0, ground_z], [y0 + w, ground_z], [y0 + w, z0], [y0, z0]], np.float32))
        self.ground_fill.set_data(vertices=verts, faces=faces_, color=V.GROUND_FILL)
        zs = np.arange(np.ceil(z0), z0 + h, 1.0)
        zs = zs[zs > ground_z + 1e-6]
        g = np.zeros((2 * len(zs), 2), np.float32)
        g[0::2, 0], g[1::2, 0] = y0, y0 + w
        g[0::2, 1] = g[1::2, 1] = zs
        self.side_grid.set_data(g if len(g) else np.zeros((2, 2), np.float32))
        self.side_grid.visible = bool(len(g))
        self.side_labels.text = [f"ground, z = {V._fmt_num(round(ground_z, 2))} m" if depth > 0 else "ground"]
        self.side_labels.pos = np.array([[y0 + w - 0.01 * w, ground_z - 0.3]], np.float32)
        self.side.camera.rect = pg.extent_side
        if state.rdmap_msg is None:
            v = float(state.summary["max_velocity_mps"])
            self.rd.camera.rect = (-v, 0.0, 2 * v, float(state.summary["max_range_m"]))

    def _apply_rd_geometry(self, msg: dict, force: bool = False) -> None:
        h = msg["header"]
        n_r, n_d = msg["data"].shape
        key = (n_r, n_d, h["range_start_m"], h["range_step_m"], h["velocity_start_mps"], h["velocity_step_mps"])
        if key == self._rd_key and not force:
            return
        self._rd_key = key
        x0, y0, sx, sy = V.rdmap_geometry(h)
        self.rd_image.transform = STTransform(scale=(sx, sy), translate=(x0, y0))
        self.rd.camera.rect = (x0, y0, sx * n_d, sy * n_r)
        self.rd_zero.set_data(np.array([[0.0, y0], [0.0, y0 + sy * n_r]], np.float32))

    def show_state(self, state: V.ViewerState, footer: str = "") -> None:
        """Bring every visual up to date with `state` (one set_data per visual)."""
        self.show_status(state, footer)
        self.show_data(state)

    def show_status(self, state: V.ViewerState, footer: str = "") -> None:
        """The header's status line and the footer only (cheap: text)."""
        text, level = V.status_line(state)
        footer = footer or ("h: keys   space: pause   c: colour by velocity / SNR   -/+: persistence   "
                            "click: a point's or cell's numbers   s: save PNG")
        by = {"velocity": "radial velocity", "snr": "SNR", "sensor": "sensor"}[state.color_by]
        right = f"persistence {state.persist.n_frames} frames  ·  points coloured by {by}"
        if state.frame == "platform" and state.color_by != "sensor":
            right += ", ringed in their sensor's hue"
        key = (text, level, footer, right)
        if key == getattr(self, "_status_key", None):
            return
        self._status_key = key
        self.status.text = text
        self.status.color = V.STATUS_COLORS[level]
        self.footer_text.text = footer
        self.footer_right.text = right

    def show_data(self, state: V.ViewerState) -> None:
        """Points, legends, the range-Doppler image, the front end's panel and the panel geometry."""
        self._apply_geometry(state)
        self.show_frontend(state)

        styled, edge = state.styled()
        if len(styled.sizes):
            ew = 1.8 if state.frame == "platform" else 1.0
            self.top_points.set_data(styled.top, face_color=styled.colors, edge_color=edge, size=styled.sizes,
                                     edge_width=ew)
            self.side_points.set_data(styled.side, face_color=styled.colors, edge_color=edge, size=styled.sizes,
                                      edge_width=ew)
        self.top_points.visible = self.side_points.visible = bool(len(styled.sizes))

        tw = self._column_w[0]
        self.top_legend.set_visible(state.color_by != "sensor")
        if state.color_by == "sensor":
            pass   # the sensors' names beside their marks, in their hues, are the legend
        elif state.color_by == "velocity":
            _, ticks = V.legend_ticks("velocity", state.velocity_span_mps)
            ticks = ticks[:-1] + [(1.0, ticks[-1][1] + " m/s")]
            self.top_legend.set("velocity", "approaching", "receding", ticks, tw - 300, 5, 220, 10)
        else:
            _, ticks = V.legend_ticks("snr", snr_range_db=state.snr_range_db)
            ticks = ticks[:-1] + [(1.0, ticks[-1][1] + " dB")]
            self.top_legend.set("snr", "SNR", "", ticks, tw - 300, 5, 220, 10)

        rd = state.rdmap_msg
        if rd is not None:
            self._apply_rd_geometry(rd)
            lo, hi = V.rdmap_limits(rd["data"])
            self.rd_image.set_data(V.map_colors(rd["data"], lo, hi))
            self.rd_image.visible = True
            self.rd_empty.visible = False
            self._rd_legend(lo, hi)
            # the rings mark the points of the map's own frame, never a newer frame's
            own = state.map_points()
            if own is not None and len(own):
                pos = V.rd_marks(own, rd["header"], rd["data"].shape[1])
                self.rd_marks.set_data(pos, face_color=(0, 0, 0, 0), edge_color=V.DETECTION_RING, size=13,
                                       edge_width=1.6, symbol="o")
                self.rd_marks.visible = True
            else:
                self.rd_marks.visible = False
            self.rd_sub.text = V.rdmap_caption(rd["header"]["seq"], own)
        else:
            self.rd_image.visible = False
            self.rd_marks.visible = False
            self.rd_sub.text = ""
            self.rd_empty.visible = True
            self._rd_legend(*V.rdmap_limits(np.zeros(1)))

    def _rd_legend(self, lo: float, hi: float) -> None:
        _, ticks = V.legend_ticks("map", map_limits_db=(lo, hi))
        ticks = ticks[:-1] + [(ticks[-1][0], ticks[-1][1] + " dB")]
        rw = self._column_w[1]
        bar_w = max(60.0, min(170.0, rw - 320.0))
        self.rd_legend.set("map", "re noise floor", "", ticks, rw - bar_w - 24, 5, bar_w, 10)

    # ---- geometry for tests and tools ----
    def data_to_pixel(self, panel: str, xy) -> np.ndarray:
        """Canvas pixel (column, row) of data coordinates in 'top', 'side' or 'rd'."""
        view = {"top": self.top, "side": self.side, "rd": self.rd}[panel]
        tr = view.scene.node_transform(self.canvas.scene)
        p = tr.map(np.atleast_2d(np.asarray(xy, np.float64)))
        return p[:, :2] * np.asarray(self.canvas.pixel_scale)

    def pixel_to_data(self, panel: str, px) -> np.ndarray:
        """Data coordinates in 'top', 'side' or 'rd' of a canvas pixel (the inverse of data_to_pixel)."""
        view = {"top": self.top, "side": self.side, "rd": self.rd}[panel]
        tr = view.scene.node_transform(self.canvas.scene)
        p = np.atleast_2d(np.asarray(px, np.float64)) / np.asarray(self.canvas.pixel_scale)
        return tr.imap(p)[0, :2]

    def panel_rect(self, panel: str) -> tuple[int, int, int, int]:
        """(column0, row0, column1, row1) of a panel's plotting area in canvas pixels, border excluded."""
        view = {"top": self.top, "side": self.side, "rd": self.rd}[panel]
        w, h = view.size
        p = view.node_transform(self.canvas.scene).map(np.array([[0.0, 0.0], [w, h]]))[:, :2]
        p = p * np.asarray(self.canvas.pixel_scale)
        x0, y0 = np.ceil(p[0]).astype(int) + 1
        x1, y1 = np.floor(p[1]).astype(int) - 1
        return int(x0), int(y0), int(x1), int(y1)

    def render(self) -> np.ndarray:
        """RGBA uint8 [height, width, 4] of the whole canvas. The first draw lays out the grid and
        moves the cameras, which the linked axes follow only on the next draw: draw twice."""
        self.canvas.render(alpha=False)
        self.refresh_axes()
        if self._frontend_state is not None:
            self.show_frontend(self._frontend_state)  # placed again now that the panels have their size
        return self.canvas.render(alpha=False)

    def refresh_axes(self) -> bool:
        """Bring the axes' number ranges up to date with their panels (refresh_linked_axes); True when
        any changed."""
        return refresh_linked_axes(self._axes)
