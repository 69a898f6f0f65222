"""Pure functions from decoded wire messages to what the panels draw: positions, colours, sizes, text.

Nothing here opens a window or imports vispy; canvas.py hands these arrays to vispy visuals.

Panels (the names are ours):
- top view: bird's-eye, x across (right positive), y forward, metres, with range rings, bearing
  lines and the azimuth field of view;
- side view: forward distance y against height z (sensor frame, the sensor at z = 0), with the
  sensor-height line, the ground line below it and the elevation field of view;
- range-Doppler: the daemon's map in dB over (radial velocity, range) with this frame's detections.

In the platform frame (`--platform`, key p) the top and side views draw every sensor on the bus in
one picture: each point at its `platform_x_m/y_m/z_m`, each sensor at its pose (the `sensor`
summary's `pose`) with its field of view turned accordingly, on a Cartesian grid; the range-Doppler
map, health and the status line stay those of one sensor (key n).

The colours are palette.py's and the reference geometry (grids, fields of view, legends) grids.py's;
both are re-exported here, so the canvas reads everything as `views.NAME`.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from .grids import *  # noqa: F401,F403 (the panels' geometry and legends, re-exported for canvas.py)
from .grids import _fmt_num  # noqa: F401
from .palette import *  # noqa: F401,F403 (the colours, re-exported)
from .frontendpanel import flag_text
from .grids import SensorPlace, pose_of, sensor_place
from .palette import (DEFAULT_PERSIST_FRAMES, DEFAULT_SENSOR_HEIGHT_M, DEFAULT_SNR_RANGE_DB,
                      DEFAULT_VELOCITY_SPAN_MPS, FRAMES, RECENT_FRAMES, SENSOR_COLORS, STATUS_OK, STATUS_STALL,
                      STATUS_WAIT, snr_colors, snr_sizes, velocity_colors)


def xyz_fields(frame: str = "sensor") -> tuple[str, str, str]:
    """The record fields of x, y, z in the sensor frame or in the platform frame."""
    if frame == "sensor":
        return "x_m", "y_m", "z_m"
    if frame == "platform":
        return "platform_x_m", "platform_y_m", "platform_z_m"
    raise ValueError(f"frame = {frame!r}: one of {FRAMES}")


def bev_positions(points: np.ndarray, frame: str = "sensor") -> np.ndarray:
    """[N, 2] float32 (x, y): the top view's data coordinates, in the sensor or the platform frame."""
    fx, fy, _ = xyz_fields(frame)
    out = np.empty((len(points), 2), np.float32)
    out[:, 0] = points[fx]
    out[:, 1] = points[fy]
    return out


def side_positions(points: np.ndarray, frame: str = "sensor") -> np.ndarray:
    """[N, 2] float32 (y, z): the side view's data coordinates, in the sensor or the platform frame."""
    _, fy, fz = xyz_fields(frame)
    out = np.empty((len(points), 2), np.float32)
    out[:, 0] = points[fy]
    out[:, 1] = points[fz]
    return out


# ---- range-Doppler --------------------------------------------------------------------------------

def rdmap_geometry(header: dict) -> tuple[float, float, float, float]:
    """(x0, y0, sx, sy): pixel (col j, row i) of the map covers velocity x0 + j*sx .. + sx and range
    y0 + i*sy .. + sy, so that the cell centres sit at the header's start + index * step."""
    sv, sr = float(header["velocity_step_mps"]), float(header["range_step_m"])
    return (float(header["velocity_start_mps"]) - sv / 2, float(header["range_start_m"]) - sr / 2, sv, sr)


def rdmap_limits(values_db: np.ndarray, floor_db: float = -3.0, min_span_db: float = 25.0) -> tuple[float, float]:
    """Colour limits: from just under the noise floor (0 dB by the wire's definition) to the strongest
    cell rounded up to 5 dB, at least `min_span_db` wide."""
    v = np.asarray(values_db, np.float64)
    top = float(np.nanmax(v)) if v.size and np.isfinite(v).any() else min_span_db
    hi = max(floor_db + min_span_db, 5.0 * math.ceil(min(top, 120.0) / 5.0))
    return floor_db, hi


def fold_velocity(velocity_mps, start_mps: float, step_mps: float, n_cols: int) -> np.ndarray:
    """Unfolded point velocities mapped into the map's (folded) velocity span, for marking."""
    span = step_mps * n_cols
    lo = start_mps - step_mps / 2
    return (np.mod(np.asarray(velocity_mps, np.float64) - lo, span) + lo).astype(np.float32)


def rd_marks(points: np.ndarray, rd_header: dict, n_cols: int) -> np.ndarray:
    """[N, 2] (velocity, range) of this frame's points on the range-Doppler panel."""
    out = np.empty((len(points), 2), np.float32)
    out[:, 0] = fold_velocity(points["velocity_mps"], float(rd_header["velocity_start_mps"]),
                              float(rd_header["velocity_step_mps"]), n_cols)
    out[:, 1] = points["range_m"]
    return out


def rdmap_caption(seq: int, own_points: np.ndarray | None) -> str:
    """The range-Doppler panel's subtitle: whose frame the map is and what its rings are."""
    if own_points is None:
        return f"frame {seq} · its points not received: no rings"
    n = len(own_points)
    return f"frame {seq} · rings: its {n} point{'' if n == 1 else 's'}"


# ---- persistence ----------------------------------------------------------------------------------

@dataclass
class StyledPoints:
    top: np.ndarray      # [N, 2]
    side: np.ndarray     # [N, 2]
    colors: np.ndarray   # [N, 4] float32
    sizes: np.ndarray    # [N]


COLOR_BY = ("velocity", "snr", "sensor")


def style_points(points: np.ndarray, color_by: str = "velocity",
                 velocity_span_mps: float = DEFAULT_VELOCITY_SPAN_MPS,
                 snr_range_db=DEFAULT_SNR_RANGE_DB, alpha: float = 1.0, size_scale: float = 1.0,
                 frame: str = "sensor", sensor_rgb=None) -> StyledPoints:
    """Positions, colours and sizes of one cloud. color_by 'sensor' paints every point in
    `sensor_rgb` (the platform picture's hue of its sensor)."""
    if color_by == "velocity":
        colors = velocity_colors(points["velocity_mps"], velocity_span_mps, alpha)
    elif color_by == "snr":
        colors = snr_colors(points["snr_db"], *snr_range_db, alpha=alpha)
    elif color_by == "sensor":
        colors = np.empty((len(points), 4), np.float32)
        colors[:, :3] = sensor_rgb if sensor_rgb is not None else SENSOR_COLORS[0]
        colors[:, 3] = alpha
    else:
        raise ValueError(f"color_by = {color_by!r}: one of {COLOR_BY}")
    return StyledPoints(bev_positions(points, frame), side_positions(points, frame), colors,
                        snr_sizes(points["snr_db"], *snr_range_db) * np.float32(size_scale))


def _concat_styled(parts: list[StyledPoints]) -> StyledPoints:
    if not parts:
        e2 = np.empty((0, 2), np.float32)
        return StyledPoints(e2, e2.copy(), np.empty((0, 4), np.float32), np.empty(0, np.float32))
    return StyledPoints(np.concatenate([p.top for p in parts]), np.concatenate([p.side for p in parts]),
                        np.concatenate([p.colors for p in parts]), np.concatenate([p.sizes for p in parts]))


def fade(age: int, n_frames: int) -> tuple[float, float]:
    """(alpha, size factor) of a cloud `age` frames old among `n_frames` kept: the newest is opaque,
    the oldest kept is faint and smaller."""
    if n_frames <= 1:
        return 1.0, 1.0
    f = age / (n_frames - 1)
    return 1.0 - 0.82 * f, 1.0 - 0.35 * f


class Persistence:
    """The last `n_frames` point clouds, merged with fading for display (oldest drawn first)."""

    def __init__(self, n_frames: int = DEFAULT_PERSIST_FRAMES):
        self.n_frames = max(1, int(n_frames))
        self._clouds: deque = deque(maxlen=self.n_frames)

    def set_frames(self, n_frames: int) -> None:
        self.n_frames = max(1, int(n_frames))
        self._clouds = deque(list(self._clouds)[-self.n_frames:], maxlen=self.n_frames)

    def clear(self) -> None:
        self._clouds.clear()

    def push(self, points: np.ndarray, seq: int | None = None) -> np.ndarray:
        """Keep one cloud (its points with finite coordinates), of frame `seq`; returns what is kept."""
        ok = np.isfinite(points["x_m"]) & np.isfinite(points["y_m"]) & np.isfinite(points["z_m"])
        kept = points if ok.all() else points[ok]
        self._clouds.append((seq, kept))
        return kept

    def __len__(self) -> int:
        return len(self._clouds)

    @property
    def newest(self) -> np.ndarray | None:
        return self._clouds[-1][1] if self._clouds else None

    def clouds(self) -> list[tuple[int | None, np.ndarray]]:
        """(frame seq, points) of every kept cloud, oldest first: the order `merged` draws them in."""
        return list(self._clouds)

    def styled_parts(self, color_by: str = "velocity", velocity_span_mps: float = DEFAULT_VELOCITY_SPAN_MPS,
                     snr_range_db=DEFAULT_SNR_RANGE_DB, frame: str = "sensor", sensor_rgb=None) -> list[StyledPoints]:
        parts = []
        n = len(self._clouds)
        for k, (_, pts) in enumerate(self._clouds):
            if len(pts) == 0:
                continue
            alpha, scale = fade(n - 1 - k, self.n_frames)
            parts.append(style_points(pts, color_by, velocity_span_mps, snr_range_db, alpha, scale, frame,
                                      sensor_rgb))
        return parts

    def merged(self, color_by: str = "velocity", velocity_span_mps: float = DEFAULT_VELOCITY_SPAN_MPS,
               snr_range_db=DEFAULT_SNR_RANGE_DB, frame: str = "sensor", sensor_rgb=None) -> StyledPoints:
        return _concat_styled(self.styled_parts(color_by, velocity_span_mps, snr_range_db, frame, sensor_rgb))


# ---- status and help ------------------------------------------------------------------------------

KEYS: tuple[tuple[str, str], ...] = (
    ("space", "pause / resume"),
    ("right or .", "single step (while paused)"),
    ("c", "colour points by radial velocity / SNR (/ sensor)"),
    ("[  ]", "velocity colour span down / up"),
    ("-  +", "persistence: fewer / more frames"),
    ("n", "next sensor on the bus (its map and health)"),
    ("p", "platform frame: every sensor in one picture / one sensor"),
    ("m", "front end per receive channel: clipping, interference, floor, DC, IRR"),
    ("f / F", "with --control: CFAR Pfa / 10, x 10"),
    ("k / K", "with --control: CFAR kind next, previous"),
    ("g / G", "with --control: CFAR guard cells -1, +1"),
    ("t / T", "with --control: CFAR training cells -1, +1"),
    ("r", "reset zoom and pan"),
    ("s", "save the window as cubecast-view-DATE-TIME.png here"),
    ("h or ?", "show / hide this help"),
    ("q or Esc", "quit"),
    ("mouse", "drag to pan, wheel to zoom (per panel)"),
    ("click", "a point or a map cell: its numbers; empty space: off"),
)
# the status line's counters, explained in the help under the keys
STATUS_WORDS: tuple[tuple[str, str], ...] = (
    ("skipped N", "point frames this viewer never drew (gaps in seq)"),
    ("dropped N", "frames serve dropped (its queue was full)"),
    ("rejected N", "frames serve refused as invalid"),
    ("gaps N", "frames that never reached serve"),
    ("rx N clipping ...", "serve's front-end warning of the last frame (key m: every channel)"),
)
HELP_ROWS: tuple[tuple[str, str], ...] = KEYS + (("", ""), ("status line", "")) + STATUS_WORDS


def help_text() -> str:
    w = max(len(k) for k, _ in HELP_ROWS)
    return "\n".join(f"{k:<{w}}   {v}".rstrip() for k, v in HELP_ROWS)


# ---- what a click shows ---------------------------------------------------------------------------

def nearest_pixel(candidates_px: np.ndarray, click_px, max_px: float = 10.0) -> int | None:
    """Index of the candidate (pixel positions [N, 2]) nearest the click, if within max_px; the last
    of equally near ones (the newest, drawn on top)."""
    c = np.asarray(candidates_px, np.float64).reshape(-1, 2)
    if len(c) == 0:
        return None
    d = np.hypot(c[:, 0] - click_px[0], c[:, 1] - click_px[1])
    k = len(d) - 1 - int(np.argmin(d[::-1]))
    return k if d[k] <= max_px else None


def rd_cell_at(header: dict, shape: tuple[int, int], velocity_mps: float, range_m: float) -> tuple[int, int] | None:
    """(row, column) of the map cell under (velocity, range) in the panel's coordinates, or None off the map."""
    x0, y0, sx, sy = rdmap_geometry(header)
    j, i = math.floor((velocity_mps - x0) / sx), math.floor((range_m - y0) / sy)
    return (i, j) if 0 <= i < shape[0] and 0 <= j < shape[1] else None


def points_in_rd_cell(points: np.ndarray, header: dict, shape: tuple[int, int], cell: tuple[int, int]) -> np.ndarray:
    """The points whose range and folded velocity fall in map cell (row, column)."""
    if len(points) == 0:
        return points
    marks = rd_marks(points, header, shape[1])
    cells = [rd_cell_at(header, shape, float(v), float(r)) for v, r in marks]
    return points[np.array([c == tuple(cell) for c in cells], bool)]


def _pm(value: float, sigma: float, digits: int, unit: str) -> str:
    return f"{value:.{digits}f} ± {sigma:.2g} {unit}".replace("-", "−")


def point_lines(p, seq, sensor_id: str | None = None) -> list[str]:
    """What a click on a point shows: its numbers with their standard deviations (with `sensor_id`,
    as in the platform picture: the sensor's name and the point in the platform frame too)."""
    head = f"POINT · frame {seq if seq is not None else '–'}"
    if sensor_id is not None:
        head = f"POINT · sensor {sensor_id} · frame {seq if seq is not None else '–'}"
        plat = [f"platform x {float(p['platform_x_m']):.2f}  y {float(p['platform_y_m']):.2f}  "
                f"z {float(p['platform_z_m']):.2f} m".replace("-", "−")]
    else:
        plat = []
    return [head,
            f"range {_pm(float(p['range_m']), float(p['sigma_range_m']), 3, 'm')}",
            f"radial velocity {_pm(float(p['velocity_mps']), float(p['sigma_velocity_mps']), 3, 'm/s')}",
            f"azimuth {_pm(float(p['azimuth_deg']), float(p['sigma_azimuth_deg']), 2, '°')}",
            f"elevation {_pm(float(p['elevation_deg']), float(p['sigma_elevation_deg']), 2, '°')}",
            f"SNR {float(p['snr_db']):.1f} dB per channel",
            f"x {float(p['x_m']):.2f}  y {float(p['y_m']):.2f}  z {float(p['z_m']):.2f} m".replace("-", "−")] + plat


def cell_lines(rdmap_msg: dict, cell: tuple[int, int], own_points: np.ndarray | None) -> list[str]:
    """What a click on a range-Doppler cell shows: the cell, its level and the map frame's points in it
    (the spectra of a cell are `cubecast inspect`'s, on a capture)."""
    h, data = rdmap_msg["header"], rdmap_msg["data"]
    i, j = cell
    x0, y0, sx, sy = rdmap_geometry(h)
    r0, v0 = y0 + i * sy, x0 + j * sx
    lines = [f"RANGE-DOPPLER CELL · frame {h['seq']}",
             f"range {r0:.2f} … {r0 + sy:.2f} m",
             f"velocity before unfolding {v0:+.2f} … {v0 + sx:+.2f} m/s".replace("-", "−"),
             f"level {float(data[i, j]):.1f} dB over the noise floor"]
    if own_points is None:
        return lines + [f"points of frame {h['seq']}: not received"]
    inside = points_in_rd_cell(own_points, h, data.shape, cell)
    lines.append(f"points of frame {h['seq']} in this cell: {len(inside)}")
    r, v = r0 + sy / 2, v0 + sx / 2
    if len(inside):
        best = inside[int(np.argmax(inside["snr_db"]))]
        lines += point_lines(best, h["seq"])[1:6]
        r, v = float(best["range_m"]), float(best["velocity_mps"])
    return lines + ["spectra of this cell, from a capture: cubecast inspect",
                    f"   CAPTURE --frame N --range-m {r:.2f} --velocity-mps {v:.2f}"]


@dataclass
class OtherSensor:
    """In the platform picture: what the viewer keeps of a sensor other than the one shown."""
    persist: Persistence
    sensor_msg: dict | None = None
    run: str | None = None


@dataclass
class ViewerState:
    """Everything the canvas shows, fed message by message (from a Feed snapshot or a list)."""

    endpoint: str = ""
    sensor_id: str | None = None
    frame: str = "sensor"            # "platform": every sensor's points in one picture (FRAMES)
    others: dict = field(default_factory=dict)   # platform frame: sensor_id -> OtherSensor (not the shown one)
    persist: Persistence = field(default_factory=Persistence)
    color_by: str = "velocity"
    velocity_span_mps: float = DEFAULT_VELOCITY_SPAN_MPS
    snr_range_db: tuple[float, float] = DEFAULT_SNR_RANGE_DB
    sensor_height_m: float | None = None   # from the command line; None: the sensor's mount height
    paused: bool = False
    sensor_msg: dict | None = None
    points_msg: dict | None = None
    rdmap_msg: dict | None = None
    health_msg: dict | None = None
    frontend_msg: dict | None = None     # the front end's latest monitor (kind `frontend`)
    show_frontend: bool = False          # the per-channel panel (key m)
    run: str | None = None
    last_seq: int | None = None
    frames_shown: int = 0
    frames_skipped: int = 0          # points frames the viewer never drew (seq gaps seen here)
    recent_points: dict = field(default_factory=dict)  # seq -> points of the last RECENT_FRAMES frames
    selection: list[str] | None = None   # the lines of the clicked point or cell, shown in a panel
    arrivals: deque = field(default_factory=lambda: deque(maxlen=32))   # receive times of clouds
    bad: int = 0
    bad_by_reason: dict = field(default_factory=dict)
    connected: bool | None = None
    idle_s: float = 0.0
    stall_after_s: float = 3.0
    any_message: bool = False

    def ingest(self, msg: dict) -> bool:
        """Take one decoded message; True when the display needs updating. Messages of another
        sensor than the one shown are skipped (the first sensor seen is shown by default), except
        in the platform frame, where the other sensors' points and descriptions are kept too."""
        if self.sensor_id is None:
            self.sensor_id = msg["sensor_id"]
        if msg["sensor_id"] != self.sensor_id:
            return self._ingest_other(msg)
        self.any_message = True
        kind = msg["kind"]
        if kind == "points":
            h = msg["header"]
            if self.run is not None and h["run"] != self.run:
                self.persist.clear()         # the source restarted: old clouds belong to another run
                self.recent_points.clear()
                self.last_seq = None
            if self.last_seq is not None and h["seq"] > self.last_seq + 1:
                self.frames_skipped += h["seq"] - self.last_seq - 1
            self.run, self.last_seq = h["run"], h["seq"]
            self.points_msg = msg
            self.recent_points[h["seq"]] = self.persist.push(msg["data"], h["seq"])
            while len(self.recent_points) > RECENT_FRAMES:
                del self.recent_points[next(iter(self.recent_points))]   # the oldest arrival
            self.frames_shown += 1
            self.arrivals.append(msg["received_s"])
        elif kind == "rdmap":
            self.rdmap_msg = msg
        elif kind == "sensor":
            self.sensor_msg = msg
        elif kind == "health":
            self.health_msg = msg
        elif kind == "frontend":
            self.frontend_msg = msg
        else:
            return False
        return True

    def _ingest_other(self, msg: dict) -> bool:
        if self.frame != "platform" or msg["kind"] not in ("points", "sensor"):
            return False
        o = self.others.get(msg["sensor_id"])
        if o is None:
            o = self.others[msg["sensor_id"]] = OtherSensor(Persistence(self.persist.n_frames))
        if msg["kind"] == "sensor":
            o.sensor_msg = msg
            return True
        h = msg["header"]
        if o.run is not None and h["run"] != o.run:
            o.persist.clear()
        o.run = h["run"]
        o.persist.push(msg["data"], h["seq"])
        return True

    def set_persist_frames(self, n_frames: int) -> None:
        self.persist.set_frames(n_frames)
        for o in self.others.values():
            o.persist.set_frames(n_frames)

    def sensor_ids(self) -> list[str]:
        """Every sensor of the picture, sorted (the shown one and, in the platform frame, the others)."""
        ids = set(self.others) if self.frame == "platform" else set()
        if self.sensor_id is not None:
            ids.add(self.sensor_id)
        return sorted(ids)

    def sensor_rgb(self, sensor_id: str) -> tuple[float, float, float]:
        ids = self.sensor_ids()
        k = ids.index(sensor_id) if sensor_id in ids else 0
        return SENSOR_COLORS[k % len(SENSOR_COLORS)]

    def clouds_by_sensor(self) -> list[tuple[str, Persistence]]:
        """(sensor id, its kept clouds) of every sensor drawn: the shown one only in the sensor frame."""
        out = []
        for sid in self.sensor_ids():
            if sid == self.sensor_id:
                out.append((sid, self.persist))
            elif sid in self.others:
                out.append((sid, self.others[sid].persist))
        return out

    def places(self) -> list[SensorPlace]:
        """Where each sensor with a known description sits on the platform, in sensor-id order."""
        out = []
        for k, sid in enumerate(self.sensor_ids()):
            msg = self.sensor_msg if sid == self.sensor_id else self.others[sid].sensor_msg
            if msg is not None:
                out.append(sensor_place(sid, msg["header"]["summary"], k))
        return out

    @property
    def platform_ground_z_m(self) -> float:
        """The ground's height in the platform frame: the shown sensor's height on the platform less
        its height above the ground."""
        pos, _ = pose_of(self.summary)
        return float(pos[2]) - self.ground_height_m

    def styled(self) -> tuple[StyledPoints, np.ndarray]:
        """What the top and side views draw, and each marker's edge colour: in the sensor frame the
        face colour darkened; in the platform frame each point ringed in its sensor's hue."""
        parts, edges = [], []
        for sid, persist in self.clouds_by_sensor():
            rgb = self.sensor_rgb(sid)
            for part in persist.styled_parts(self.color_by, self.velocity_span_mps, self.snr_range_db,
                                             self.frame, rgb):
                edge = part.colors.copy()
                if self.frame == "platform" and self.color_by != "sensor":
                    edge[:, :3] = rgb
                else:
                    edge[:, :3] *= 0.35
                parts.append(part)
                edges.append(edge)
        styled = _concat_styled(parts)
        return styled, (np.concatenate(edges) if edges else np.empty((0, 4), np.float32))

    def map_points(self) -> np.ndarray | None:
        """The points of the range-Doppler map's own frame (the map's `seq`), which the map's rings
        mark; None without a map, or when that frame's points are not (or no longer) here: then no
        rings are drawn rather than another frame's."""
        if self.rdmap_msg is None:
            return None
        return self.recent_points.get(self.rdmap_msg["header"]["seq"])

    @property
    def ground_height_m(self) -> float:
        """Sensor height above the ground for the side view: the command line's value, else the
        sensor description's mount_height_m, else DEFAULT_SENSOR_HEIGHT_M."""
        if self.sensor_height_m is not None:
            return float(self.sensor_height_m)
        h = self.summary.get("mount_height_m")
        if isinstance(h, (int, float)) and not isinstance(h, bool) and 0 <= h <= 100:
            return float(h)
        return DEFAULT_SENSOR_HEIGHT_M

    @property
    def summary(self) -> dict:
        if self.sensor_msg is not None:
            return self.sensor_msg["header"]["summary"]
        return {"max_range_m": 20.0, "max_velocity_mps": 5.0, "fov_half_azimuth_deg": 60.0,
                "fov_half_elevation_deg": 20.0, "range_resolution_m": 0.2, "velocity_resolution_mps": 0.1}

    def fps_measured(self) -> float | None:
        a = self.arrivals
        if len(a) < 2 or a[-1] <= a[0]:
            return None
        return (len(a) - 1) / (a[-1] - a[0])


def status_line(state: ViewerState, stall_after_s: float | None = None) -> tuple[str, str]:
    """(text, level) with level 'wait', 'ok', 'warn' (a front-end warning: its flag at the end), 'stall'
    or 'paused'."""
    stall_after_s = state.stall_after_s if stall_after_s is None else stall_after_s
    if not state.any_message:
        conn = "" if state.connected is None else ("  (connected, no messages yet)" if state.connected
                                                   else "  (not connected)")
        return f"waiting for data on {state.endpoint or '(no endpoint)'}{conn}", "wait"
    parts = [f"sensor {state.sensor_id}"]
    if state.frame == "platform":
        n = len(state.sensor_ids())
        parts = [f"platform frame, {n} sensor{'' if n == 1 else 's'}", f"map and health of {state.sensor_id}"]
    pm, hm = state.points_msg, state.health_msg
    parts.append(f"frame {pm['header']['seq']}" if pm else "frame –")
    fps = hm["header"]["fps"] if hm else state.fps_measured()
    parts.append(f"{fps:.1f} fps" if fps is not None else "– fps")
    if pm:
        lat = f"latency {pm['header']['latency_s'] * 1e3:.1f} ms"
        p99 = hm["header"]["latency_p99_ms"] if hm else None   # nil while serve is idle
        if p99 is not None:
            lat += f" (p99 {p99:.1f})"
        parts.append(lat)
        parts.append(f"{pm['header']['count']} points")
    if hm:
        h = hm["header"]
        parts.append(f"dropped {h['frames_dropped']}")
        parts.append(f"rejected {h['frames_rejected']}")
        if h["sequence_gaps"]:
            parts.append(f"gaps {h['sequence_gaps']}")
    if state.frames_skipped:
        parts.append(f"skipped {state.frames_skipped}")
    flag = flag_text(state.frontend_msg)
    if flag:
        parts.append(flag)
    if state.bad:
        why = ", ".join(f"{k} {v}" for k, v in sorted(state.bad_by_reason.items()))
        parts.append(f"bad messages {state.bad} ({why})")
    text = "  ·  ".join(parts)
    if state.idle_s > stall_after_s:
        link = "" if state.connected is None else ("; link down" if not state.connected else "; link up")
        return f"STALLED: nothing for {state.idle_s:.1f} s on {state.endpoint}{link}  ·  " + text, "stall"
    if state.paused:
        return "PAUSED  ·  " + text, "paused"
    return text, "warn" if flag else "ok"


STATUS_COLORS = {"wait": STATUS_WAIT, "ok": STATUS_OK, "stall": STATUS_STALL, "paused": STATUS_WAIT,
                 "warn": STATUS_WAIT}
