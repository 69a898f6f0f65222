"""The figure of one inspected range-Doppler cell (`cubecast inspect --png`), drawn offscreen with
vispy as the viewer's snapshot is.

    render_inspection(result, "cell.png", size=(1600, 1000))

`result` is the plain dict `cubecast inspect --json` prints (daemon/inspect.py makes it); nothing
here imports the daemon. Panels: the cell's numbers; the range profile at the cell's Doppler and the
Doppler spectrum at its range (map and CFAR threshold, the cell marked); the azimuth and elevation
spectra of its virtual snapshot (the estimate and its ± 1 sigma Cramér-Rao interval marked); and the
virtual channels' amplitude and phase, with the phase a plane wave from the estimate would have.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from . import views as V

CURVE = (0.30, 0.78, 0.74, 1.0)        # sea green, the measured curves
THRESHOLD = V.FOV_EDGE                  # brass, the CFAR threshold
MARK = V.DETECTION_RING                 # rose, the cell and the estimate
BAND = (1.00, 0.32, 0.60, 0.22)
EXPECTED = (0.95, 0.95, 0.95, 1.0)
TITLE_H = 30
XAXIS_H = 42   # canvas.XAXIS_H


def _finite(a) -> np.ndarray:
    """A JSON list (null for inf / nan) as float64 with nan."""
    return np.array([np.nan if v is None else v for v in a], np.float64)


def _limits(values: np.ndarray, floor_span: float, pad: float = 0.08) -> tuple[float, float]:
    v = values[np.isfinite(values)]
    if v.size == 0:
        return 0.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    lo = max(lo, hi - floor_span) if floor_span else lo
    span = max(hi - lo, 1e-6)
    return lo - pad * span, hi + pad * span


def expected_phases_deg(channels: dict, estimate: dict, wavelength_m: float) -> np.ndarray:
    """Phase of each virtual channel for a far-field plane wave from the estimated direction,
    -360 (x u + z w) / lambda degrees (README signal model: the phase falls along +x for a target to
    the right), offset by the circular mean of the measured phases' misfit, wrapped to +-180."""
    az, el = math.radians(estimate["azimuth_deg"]), math.radians(estimate["elevation_deg"])
    u, w = math.sin(az) * math.cos(el), math.sin(el)
    model = -360.0 * (_finite(channels["x_m"]) * u + _finite(channels["z_m"]) * w) / wavelength_m
    measured = _finite(channels["phase_deg"])
    offset = math.degrees(np.angle(np.nanmean(np.exp(1j * np.radians(measured - model)))))
    return (model + offset + 180.0) % 360.0 - 180.0


class InspectionFigure:
    """The canvas and its panels; `data_to_pixel(panel, xy)` for tests (panel names in `views`)."""

    def __init__(self, result: dict, size=(1600, 1000), dpi=96):
        from vispy import scene
        from vispy.visuals.text.text import FontManager
        from .canvas import FONT, make_panel, refresh_linked_axes
        self._scene, self._font, self._refresh = scene, FONT, refresh_linked_axes
        self.fonts = FontManager(method="cpu")
        self.canvas = scene.SceneCanvas(size=size, show=False, bgcolor=V.BACKGROUND, keys=None, dpi=dpi)
        self._make_panel = make_panel
        self._axes: list = []
        self.views: dict = {}
        self.result = result
        grid = self.canvas.central_widget.add_grid(spacing=0, margin=10)
        header = grid.add_widget(row=0, col=0, col_span=3)
        header.height_min = header.height_max = 34
        self._text(self._header_text(), parent=header, color=V.TEXT, font_size=11, bold=True, pos=(6, 17))
        # vispy's grid solver shares space unevenly (canvas.py says the same): every cell sized here
        w, h = size
        self._cell_w, self._cell_h = (w - 20) / 3.0, (h - 20 - 34) / 2.0
        cells = [[grid.add_grid(row=1 + i, col=j) for j in range(3)] for i in range(2)]
        for row in cells:
            for cell in row:
                cell.width_min = cell.width_max = self._cell_w
                cell.height_min = cell.height_max = self._cell_h
        self._numbers(cells[0][0])
        self._range_profile(cells[0][1])
        self._doppler_spectrum(cells[0][2])
        self._angle(cells[1][0], "azimuth")
        self._angle(cells[1][1], "elevation")
        self._channels(cells[1][2])

    # ---- helpers ----
    def _text(self, text, **kw):
        kw.setdefault("face", self._font)
        kw.setdefault("anchor_x", "left")
        kw.setdefault("anchor_y", "center")
        return self._scene.visuals.Text(text, font_manager=self.fonts, **kw)

    def _plot(self, grid, name: str, title: str, sub: str, x_label: str, y_label: str, row: int = 0,
              height: float | None = None):
        """A titled plot in rows row .. row + 2 of a cell's grid, `height` pixels tall with its title
        and x axis (default: the whole cell)."""
        height = self._cell_h if height is None else height
        t = grid.add_widget(row=row, col=0, col_span=2)
        t.height_min = t.height_max = TITLE_H
        self._text(title, parent=t, color=V.TEXT, font_size=10, bold=True, pos=(60, 15))
        self._text(sub, parent=t, color=V.TEXT_DIM, font_size=8, pos=(68 + 8.6 * len(title), 15.5))
        view, xa, ya = self._make_panel(grid, row + 1, x_label, y_label, None, self.fonts)
        view.height_min = view.height_max = height - TITLE_H - XAXIS_H
        self._axes.extend((xa, ya))
        self.views[name] = view
        return view

    def _line(self, view, x, y, color, width=1.6):
        pos = np.stack([np.asarray(x, np.float32), np.asarray(y, np.float32)], 1)
        ok = np.isfinite(pos).all(axis=1)
        line = self._scene.visuals.Line(pos[ok], color=color, width=width, parent=view.scene, method="gl",
                                        antialias=True)
        line.set_gl_state("translucent", depth_test=False)
        return line

    def _markers(self, view, x, y, face, edge=None, size=9, symbol="o"):
        pos = np.stack([np.atleast_1d(np.asarray(x, np.float32)), np.atleast_1d(np.asarray(y, np.float32))], 1)
        m = self._scene.visuals.Markers(parent=view.scene)
        m.set_data(pos, face_color=face, edge_color=edge if edge is not None else face, size=size, symbol=symbol,
                   edge_width=1.4)
        m.set_gl_state("translucent", depth_test=False)
        m.order = 5
        return m

    def _vline(self, view, x, y0, y1, color, width=1.2):
        return self._line(view, [x, x], [y0, y1], color, width)

    def _band(self, view, x0, x1, y0, y1, color):
        from .canvas import _quad
        verts, faces = _quad(np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], np.float32))
        mesh = self._scene.visuals.Mesh(vertices=verts, faces=faces, color=color, parent=view.scene)
        mesh.set_gl_state("translucent", depth_test=False)
        mesh.order = -1
        return mesh

    def _frame(self, view, x0, x1, y0, y1):
        view.camera.rect = (x0, y0, x1 - x0, y1 - y0)

    def _header_text(self) -> str:
        r, c = self.result, self.result["cell"]
        where = f"{r['capture']} · frame {r['frame']} (seq {r['sequence']}) · " if "capture" in r else ""
        return (f"cubecast inspect · {where}sensor {r['sensor_id']} · cell: range {c['range_m']:.3f} m, velocity "
                f"{c['velocity_unfolded_mps']:+.3f} m/s (bins {c['range_bin']}, {c['doppler_bin']:+d})")

    # ---- panels ----
    def _numbers(self, grid) -> None:
        t = grid.add_widget(row=0, col=0)
        t.height_min = t.height_max = TITLE_H
        self._text("CELL", parent=t, color=V.TEXT, font_size=10, bold=True, pos=(12, 15))
        box = grid.add_view(row=1, col=0, bgcolor=V.PANEL_BG, border_color=V.GRID)
        box.height_min = box.height_max = self._cell_h - TITLE_H - 12
        lines = cell_lines(self.result)
        for color in {c for _, c in lines}:   # one text visual per colour
            rows = [i for i, (_, c) in enumerate(lines) if c == color]
            self._text([lines[i][0] for i in rows], parent=box, color=color or V.TEXT, font_size=9,
                       pos=np.array([[14, 22 + 19 * i] for i in rows], np.float32))

    def _range_profile(self, grid) -> None:
        c = self.result["cell"]
        self._cut(grid, "range", "RANGE PROFILE", f"at {c['velocity_mps']:+.2f} m/s", "range_profile", "range_m",
                  "range (m)", c["range_m"])

    def _doppler_spectrum(self, grid) -> None:
        c = self.result["cell"]
        self._cut(grid, "doppler", "DOPPLER SPECTRUM", f"at {c['range_m']:.2f} m", "doppler_spectrum",
                  "velocity_mps", "radial velocity before unfolding (m/s)", c["velocity_mps"])

    def _cut(self, grid, name: str, title: str, where: str, key: str, x_key: str, x_label: str,
             x_cell: float) -> None:
        """A cut through the map at the cell (range profile or Doppler spectrum) with the threshold."""
        cut, p_cell = self.result[key], self.result["cell"]["power_db"]
        view = self._plot(grid, name, title, f"{where} · green: map, brass: CFAR threshold", x_label,
                          "power (dB over the map median)")
        x, p, t = _finite(cut[x_key]), _finite(cut["power_db"]), _finite(cut["threshold_db"])
        lo, hi = _limits(np.concatenate([p, t]), 0.0)
        self._line(view, x, t, THRESHOLD, 1.3)
        self._line(view, x, p, CURVE, 1.6)
        self._vline(view, x_cell, lo, hi, (1.0, 0.32, 0.60, 0.55), 1.0)
        self._markers(view, x_cell, p_cell, (0, 0, 0, 0), MARK, 13)
        step = float(np.nanmedian(np.diff(x))) if x.size > 1 else 1.0
        self._frame(view, float(np.nanmin(x)) - step, float(np.nanmax(x)) + step, lo, hi)

    def _angle(self, grid, axis: str) -> None:
        a = self.result["angle"]
        est, spec = a["estimate"], a[axis]
        key = f"{axis}_deg"
        other = ("el", spec.get("through_elevation_deg")) if axis == "azimuth" else \
            ("az", spec.get("through_azimuth_deg"))
        sigma = est.get(f"sigma_{axis}_deg")
        value = est[key]
        interval = f"{value:.2f}° ± {sigma:.2g}°" if sigma is not None else f"{value:.2f}° (no bound)"
        v = self._plot(grid, axis, f"{axis.upper()} SPECTRUM", f"through {other[0]} {other[1]:.1f}° · rose: "
                       f"estimate, band ± 1 sigma (CRB)", f"{axis} (deg)", "beam power (dB over channel noise)")
        x, p = _finite(spec[key]), _finite(spec["power_db"])
        lo, hi = _limits(p, 45.0)
        if sigma is not None and math.isfinite(sigma):
            self._band(v, value - sigma, value + sigma, lo, hi, BAND)
        self._vline(v, value, lo, hi, MARK, 1.4)
        self._line(v, x, p, CURVE, 1.6)
        for pt in self.result["points"]:
            self._markers(v, pt[key], hi - 0.06 * (hi - lo), MARK, V.BACKGROUND, 8, "triangle_down")
        x0 = -90.0 if x.size < 2 else float(np.nanmin(x)) - 2
        x1 = 90.0 if x.size < 2 else float(np.nanmax(x)) + 2
        x0, x1 = min(x0, value - 2), max(x1, value + 2)   # the estimate always in view
        left = value < 0.5 * (x0 + x1)
        self._text(("  " + interval) if left else (interval + "  "), parent=v.scene, color=MARK, font_size=9,
                   pos=(value, hi - 0.12 * (hi - lo)), anchor_x="left" if left else "right").order = 6
        self._frame(v, x0, x1, lo, hi)

    def _channels(self, grid) -> None:
        ch, a = self.result["channels"], self.result["angle"]
        idx = _finite(ch["index"])
        amp, ph = _finite(ch["amplitude_db"]), _finite(ch["phase_deg"])
        v = self._plot(grid, "amplitude", "CHANNELS", "amplitude and phase of each virtual channel k n_rx + l",
                       "virtual channel", "amplitude (dB over noise)", height=self._cell_h / 2)
        lo, hi = _limits(amp, 0.0, 0.25)
        lo, hi = min(lo, float(np.nanmax(amp)) - 3.0), max(hi, float(np.nanmax(amp)) + 1.0)
        for i, val in zip(idx, amp):
            self._line(v, [i, i], [lo, val], (0.30, 0.78, 0.74, 0.45), 1.0)
        self._markers(v, idx, amp, CURVE, None, 8)
        self._frame(v, -0.8, idx.size - 0.2, lo, hi)
        pv = self._plot(grid, "phase", "", "white rings: the phase of a plane wave from the estimate",
                        "virtual channel", "phase (deg)", row=3, height=self._cell_h / 2)
        self._markers(pv, idx, expected_phases_deg(ch, a["estimate"], a["wavelength_m"]), (0, 0, 0, 0), EXPECTED,
                      13)
        self._markers(pv, idx, ph, CURVE, None, 7)
        for y in (-90.0, 0.0, 90.0):
            self._line(pv, [-1.0, idx.size], [y, y], V.GRID, 1.0)
        self._frame(pv, -0.8, idx.size - 0.2, -200.0, 200.0)

    # ---- output ----
    def render(self) -> np.ndarray:
        """RGBA uint8 [h, w, 4]; drawn twice, as ViewerCanvas.render (the axes follow the layout)."""
        self.canvas.render(alpha=False)
        self._refresh(self._axes)
        return self.canvas.render(alpha=False)

    def data_to_pixel(self, panel: str, xy) -> np.ndarray:
        view = self.views[panel]
        tr = view.scene.node_transform(self.canvas.scene)
        p = tr.map(np.atleast_2d(np.asarray(xy, np.float64)))
        return p[:, :2] * np.asarray(self.canvas.pixel_scale)

    def close(self) -> None:
        self.canvas.close()


def _fmt_pm(v, s, digits: int) -> str:
    return f"{v:.{digits}f}" + (f" ± {s:.2g}" if s is not None else "")


def cell_lines(result: dict) -> list[tuple[str, tuple | None]]:
    """The numbers panel: (line, colour or None for the default)."""
    c, est = result["cell"], result["angle"]["estimate"]
    snr = "–" if c["snr_db"] is None else f"{c['snr_db']:.1f}"
    verdict = ("detected" if c["detected"] else "not detected") + (
        "" if c["in_range_gates"] else " (outside the range gates)")
    lines: list[tuple[str, tuple | None]] = [
        (f"range {c['range_m']:.3f} m   (bin {c['range_bin']}, {c['range_bin_m']:.4f} m a bin)", None),
        (f"velocity {c['velocity_mps']:+.3f} m/s before unfolding, {c['velocity_unfolded_mps']:+.3f} unfolded", None),
        (f"   (Doppler bin {c['doppler_bin']:+d}, {c['velocity_bin_mps']:.4f} m/s a bin, hypothesis "
         f"{c['unfolding_hypothesis']:+d})", None),
        (f"map {c['power_db']:.1f} dB   CFAR noise {c['noise_db']:.1f} dB   threshold {c['threshold_db']:.1f} dB", None),
        ("   (dB over the map median; " + c["cfar_kind"].upper() + "-CFAR)", None),
        (f"SNR {snr} dB per channel · " + ("above" if c["above_threshold"] else "below") + " the threshold · "
         + verdict, V.STATUS_OK if c["detected"] else V.STATUS_WAIT),
        (f"direction: azimuth {_fmt_pm(est['azimuth_deg'], est['sigma_azimuth_deg'], 2)}°, elevation "
         f"{_fmt_pm(est['elevation_deg'], est['sigma_elevation_deg'], 2)}°", None),
        ("   (none: the angle estimator finds no peak)" if est["source"] == "none" else
         f"   (from the {est['source']}; ± 1 sigma)", None),
        (f"points from this cell: {len(result['points'])}", None),
    ]
    for k, p in enumerate(result["points"][:4]):
        lines.append((f" {k + 1}. range {_fmt_pm(p['range_m'], p['sigma_range_m'], 3)} m, velocity "
                      f"{_fmt_pm(p['velocity_mps'], p['sigma_velocity_mps'], 3)} m/s", None))
        lines.append((f"    az {_fmt_pm(p['azimuth_deg'], p['sigma_azimuth_deg'], 2)}°, el "
                      f"{_fmt_pm(p['elevation_deg'], p['sigma_elevation_deg'], 2)}°, SNR {p['snr_db']:.1f} dB", None))
    for p in result.get("nearby_points", [])[:2]:
        lines.append((f"nearby: {p['range_m']:.3f} m, {p['velocity_mps']:+.3f} m/s, detected in the next cell "
                      f"({p['detection_range_m']:.3f} m, {p['detection_velocity_mps']:+.3f} m/s)", V.STATUS_WAIT))
    return lines


def render_inspection(result: dict, out_png: str | Path, size=(1600, 1000)) -> np.ndarray:
    """Render an inspection offscreen (EGL or OSMesa, as snapshot.py) to a PNG; returns the RGBA pixels."""
    from .snapshot import offscreen_backend, write_png
    offscreen_backend()
    fig = InspectionFigure(result, size=size)
    try:
        img = fig.render()
    finally:
        fig.close()
    write_png(out_png, img[..., :3])
    return img
