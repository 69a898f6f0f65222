"""The panels' reference geometry, pure numpy: the top view's range rings, bearings and field of
view, the side view's ground and field of view, the platform picture (every sensor at its pose on a
Cartesian grid), and the colour bars' legends.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..daemon import wire
from .palette import (DEFAULT_SENSOR_HEIGHT_M, DEFAULT_SNR_RANGE_DB, DEFAULT_VELOCITY_SPAN_MPS, MAP_STOPS,
                      SENSOR_COLORS, SNR_STOPS, VELOCITY_STOPS, _ramp)

# ---- grids and outlines ---------------------------------------------------------------------------

def nice_step(span: float, target_count: int = 6) -> float:
    """A 1-2-5 step giving about `target_count` intervals over `span` (common practice for axes)."""
    raw = max(span, 1e-9) / max(target_count, 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    for m in (1.0, 2.0, 2.5, 5.0, 10.0):
        if m * mag >= raw * 0.999:
            return m * mag
    return 10.0 * mag


def _fmt_num(v: float) -> str:
    return f"{v:.0f}" if abs(v - round(v)) < 1e-6 else f"{v:g}"


def polyline_segments(poly: np.ndarray) -> np.ndarray:
    """[K, 2] polyline -> [2(K-1), 2] segment end points (for a Line with connect='segments')."""
    poly = np.asarray(poly, np.float32)
    if len(poly) < 2:
        return np.empty((0, 2), np.float32)
    seg = np.empty((2 * (len(poly) - 1), 2), np.float32)
    seg[0::2] = poly[:-1]
    seg[1::2] = poly[1:]
    return seg


def arc(radius_m: float, from_deg: float, to_deg: float, n: int = 64) -> np.ndarray:
    """Points of an arc of bearings (azimuth, 0 = forward, positive right) in the x-y plane."""
    az = np.radians(np.linspace(from_deg, to_deg, n))
    return np.stack([radius_m * np.sin(az), radius_m * np.cos(az)], 1).astype(np.float32)


@dataclass
class Label:
    text: str
    pos: tuple[float, float]
    anchor: tuple[str, str] = ("center", "center")   # (anchor_x, anchor_y) as vispy names them


@dataclass
class TopGrid:
    rings: np.ndarray            # segments [2M, 2]
    bearings: np.ndarray         # segments
    fov_outline: np.ndarray      # closed polyline [K, 2]
    labels: list[Label]
    ring_step_m: float
    bearing_step_deg: float
    extent: tuple[float, float, float, float]   # x0, y0, width, height for the camera


def top_grid(max_range_m: float, fov_half_azimuth_deg: float) -> TopGrid:
    """Range rings every nice step (labelled in m), bearing lines every 15/30 degrees inside the field
    of view (labelled in degrees), the field of view wedge, and the view's extent."""
    fov = float(min(max(fov_half_azimuth_deg, 1.0), 90.0))
    step = nice_step(max_range_m, 5)
    radii = np.arange(step, max_range_m + 1e-6, step)
    # rings cover the front half-plane a little past the field of view
    ring_segs = [polyline_segments(arc(r, -min(fov + 12, 90), min(fov + 12, 90), 96)) for r in radii]
    bstep = 15.0 if fov <= 60 else 30.0
    k = math.floor(fov / bstep)
    bearings_deg = [b * bstep for b in range(-k, k + 1)]
    segs, labels = [], []
    r_out = max_range_m
    for b in bearings_deg:
        p = arc(r_out, b, b, 1)[0]
        segs.append(np.array([[0.0, 0.0], p], np.float32))
        lp = arc(r_out + 0.045 * r_out, b, b, 1)[0]
        labels.append(Label(f"{b:+.0f}°" if b else "0°", (float(lp[0]), float(lp[1]))))
    # ring labels just outside the left edge of the field of view, where no target can be drawn; the
    # outermost ring, when it is the field of view's own arc, is named in the panel's subtitle instead
    lab_deg = -min(fov + 6.0, 86.0)
    for r in radii:
        if r > 0.94 * max_range_m and fov > 45.0:
            continue
        p = arc(r, lab_deg, lab_deg, 1)[0]
        labels.append(Label(f"{_fmt_num(r)} m", (float(p[0]), float(p[1])), ("center", "center")))
    wedge = np.concatenate([[[0.0, 0.0]], arc(max_range_m, -fov, fov, 96), [[0.0, 0.0]]]).astype(np.float32)
    half_w = max_range_m * math.sin(math.radians(min(fov + 12, 90))) * 1.04
    y0 = -0.06 * max_range_m
    return TopGrid(rings=np.concatenate(ring_segs) if ring_segs else np.empty((0, 2), np.float32),
                   bearings=np.concatenate(segs) if segs else np.empty((0, 2), np.float32),
                   fov_outline=wedge, labels=labels, ring_step_m=step, bearing_step_deg=bstep,
                   extent=(-half_w, y0, 2 * half_w, max_range_m * 1.12 - y0))


@dataclass
class SideGrid:
    ground: np.ndarray           # segments of the ground line at z = -sensor_height_m
    ground_fill: np.ndarray      # polygon below the ground line
    sensor_line: np.ndarray      # dashed segments at z = 0
    fov_edges: np.ndarray        # segments from the sensor along +-fov_half_elevation_deg
    labels: list[Label]
    extent: tuple[float, float, float, float]


def side_grid(max_range_m: float, fov_half_elevation_deg: float,
              sensor_height_m: float = DEFAULT_SENSOR_HEIGHT_M, z_top_m: float | None = None) -> SideGrid:
    """The side view's reference lines: sensor height (z = 0, dashed), ground (z = -height), the
    elevation field of view, and an extent that shows ground to a few metres overhead."""
    h = max(float(sensor_height_m), 0.0)
    y_end = max_range_m * 1.02
    ground = np.array([[0.0, -h], [y_end, -h]], np.float32)
    depth = max(0.6, 0.12 * (h + 4.0))
    ground_fill = np.array([[0.0, -h], [y_end, -h], [y_end, -h - depth], [0.0, -h - depth]], np.float32)
    dash = max_range_m / 60.0
    xs = np.arange(0.0, y_end, 2 * dash)
    sensor_line = np.empty((2 * len(xs), 2), np.float32)
    sensor_line[0::2, 0] = xs
    sensor_line[1::2, 0] = np.minimum(xs + dash, y_end)
    sensor_line[:, 1] = 0.0
    z_top = z_top_m if z_top_m is not None else max(5.0, h + 4.0)
    fe = math.radians(min(max(fov_half_elevation_deg, 0.5), 89.0))
    edges = []
    for sgn in (+1, -1):
        # run the edge to the range limit or to the top / ground, whichever comes first
        zlim = z_top if sgn > 0 else -h
        y_hit = min(max_range_m, abs(zlim) / math.tan(fe)) if zlim else max_range_m
        edges.append([[0.0, 0.0], [y_hit, sgn * y_hit * math.tan(fe)]])
    # labels at the far end, right-aligned, clear of the sensor mark and the field-of-view edges
    labels = [
        Label(f"ground, {_fmt_num(h)} m below the sensor" if h else "ground", (y_end - 0.3, -h - 0.3),
              ("right", "center")),
        Label("sensor height", (y_end - 0.3, 0.3), ("right", "center")),
    ]
    y0 = -0.03 * max_range_m
    z0 = -h - depth
    return SideGrid(ground=ground, ground_fill=ground_fill, sensor_line=sensor_line,
                    fov_edges=np.array(edges, np.float32).reshape(-1, 2), labels=labels,
                    extent=(y0, z0, y_end - y0 + 0.02 * max_range_m, z_top - z0))


# ---- the platform picture -------------------------------------------------------------------------

@dataclass
class SensorPlace:
    """One sensor in the platform picture: where it sits and where it looks."""
    sensor_id: str
    rgb: tuple[float, float, float]
    position_m: np.ndarray          # [3], platform frame
    rotation: np.ndarray            # [3, 3], sensor -> platform
    max_range_m: float
    fov_half_azimuth_deg: float
    fov_half_elevation_deg: float


def pose_of(summary: dict) -> tuple[np.ndarray, np.ndarray]:
    """(position [3], rotation [3, 3]) from a `sensor` summary's `pose` (identity when absent)."""
    pose = summary.get("pose") or {}
    pos = np.asarray(pose.get("position_m", (0.0, 0.0, 0.0)), np.float64).reshape(3)
    rot = wire.pose_rotation(float(pose.get("yaw_deg", 0.0)), float(pose.get("pitch_deg", 0.0)),
                             float(pose.get("roll_deg", 0.0)))
    return pos, rot


def sensor_place(sensor_id: str, summary: dict, index: int) -> SensorPlace:
    pos, rot = pose_of(summary)
    return SensorPlace(sensor_id, SENSOR_COLORS[index % len(SENSOR_COLORS)], pos, rot,
                       float(summary["max_range_m"]), float(summary["fov_half_azimuth_deg"]),
                       float(summary["fov_half_elevation_deg"]))


def _to_platform(place: SensorPlace, xyz: np.ndarray) -> np.ndarray:
    return np.asarray(xyz, np.float64) @ place.rotation.T + place.position_m


def fov_wedge_platform(place: SensorPlace, n: int = 48) -> np.ndarray:
    """The azimuth field of view (at zero elevation, to the maximum range) as a closed polyline [K, 3]
    in the platform frame: the sensor, the arc, back to the sensor."""
    fov = math.radians(min(max(place.fov_half_azimuth_deg, 1.0), 90.0))
    az = np.linspace(-fov, fov, n)
    arc_s = np.stack([place.max_range_m * np.sin(az), place.max_range_m * np.cos(az), np.zeros(n)], 1)
    poly = np.concatenate([[[0.0, 0.0, 0.0]], arc_s, [[0.0, 0.0, 0.0]]])
    return _to_platform(place, poly)


def elevation_edges_platform(place: SensorPlace) -> np.ndarray:
    """The two edges of the elevation field of view (boresight plane), as segments [4, 3] from the sensor."""
    fe = math.radians(min(max(place.fov_half_elevation_deg, 0.5), 89.0))
    r = place.max_range_m
    ends = np.array([[0.0, r * math.cos(fe), r * math.sin(fe)], [0.0, r * math.cos(fe), -r * math.sin(fe)]])
    origin = np.zeros(3)
    return _to_platform(place, np.array([origin, ends[0], origin, ends[1]]))


@dataclass
class PlatformGrid:
    grid: np.ndarray             # segments [2M, 2], the top view's Cartesian grid
    wedges: list[np.ndarray]     # per sensor, segments [2K, 2] of its field of view (top view)
    side_edges: list[np.ndarray]  # per sensor, segments [4, 2] (y, z) of its elevation field of view
    marks_top: np.ndarray        # [S, 2] sensor positions (x, y)
    marks_side: np.ndarray       # [S, 2] sensor positions (y, z)
    labels_top: list[Label]      # sensor names, a key in the top left corner
    ground_z_m: float
    step_m: float
    extent_top: tuple[float, float, float, float]
    extent_side: tuple[float, float, float, float]


def platform_grid(places: list[SensorPlace], ground_z_m: float) -> PlatformGrid:
    """The top and side views of the platform picture: a Cartesian grid every nice step over all the
    sensors' fields of view and the platform origin, each sensor's wedge and elevation edges, marks,
    names, and the views' extents."""
    wedges3 = [fov_wedge_platform(p) for p in places]
    edges3 = [elevation_edges_platform(p) for p in places]
    pts = np.concatenate([np.zeros((1, 3))] + wedges3) if places else np.array([[0.0, 0.0, 0.0], [0.0, 20.0, 0.0]])
    x0, x1 = float(pts[:, 0].min()), float(pts[:, 0].max())
    y0, y1 = float(pts[:, 1].min()), float(pts[:, 1].max())
    span = max(x1 - x0, y1 - y0, 1.0)
    pad = 0.06 * span
    x0, x1, y0, y1 = x0 - pad, x1 + pad, y0 - pad, y1 + pad
    step = nice_step(span, 6)
    xs = np.arange(math.ceil(x0 / step) * step, x1 + 1e-9, step)
    ys = np.arange(math.ceil(y0 / step) * step, y1 + 1e-9, step)
    seg = [[[x, y0], [x, y1]] for x in xs] + [[[x0, y], [x1, y]] for y in ys]
    grid = np.asarray(seg, np.float32).reshape(-1, 2)
    wedges = [polyline_segments(w[:, :2]) for w in wedges3]
    side_edges = [e[:, 1:].astype(np.float32) for e in edges3]
    marks = np.array([p.position_m for p in places], np.float64).reshape(-1, 3)
    # the sensors' names, a list in their hues in the grid's top left corner: the key to the marks
    labels = [Label(f"sensor {p.sensor_id}", (x0 + 0.02 * span, y1 - 0.05 * span - k * 0.05 * span),
                    ("left", "center")) for k, p in enumerate(places)]
    side_pts = np.concatenate([np.array([[0.0, 0.0, ground_z_m]])] + edges3) if places else np.zeros((1, 3))
    sy0 = min(float(side_pts[:, 1].min()), y0)
    sy1 = max(float(side_pts[:, 1].max()), y1)
    z_top = max(float(side_pts[:, 2].max()), ground_z_m + 5.0)
    depth = max(0.6, 0.04 * (sy1 - sy0))
    return PlatformGrid(grid=grid, wedges=wedges, side_edges=side_edges,
                        marks_top=marks[:, :2].astype(np.float32), marks_side=marks[:, 1:].astype(np.float32),
                        labels_top=labels, ground_z_m=float(ground_z_m), step_m=step,
                        extent_top=(x0, y0, x1 - x0, y1 - y0),
                        extent_side=(sy0, ground_z_m - depth, sy1 - sy0, z_top + 1.0 - (ground_z_m - depth)))


# ---- legends --------------------------------------------------------------------------------------

def colorbar_rgba(kind: str, n: int = 256) -> np.ndarray:
    """A horizontal colour bar image [1, n, 4] uint8 for 'velocity', 'snr' or 'map'."""
    t = np.linspace(0.0, 1.0, n)
    if kind == "velocity":
        rgb = _ramp(VELOCITY_STOPS, 2.0 * t - 1.0)
    elif kind == "snr":
        rgb = _ramp(SNR_STOPS, t)
    elif kind == "map":
        rgb = _ramp(MAP_STOPS, t)
    else:
        raise ValueError(f"unknown colour bar '{kind}'")
    out = np.empty((1, n, 4), np.uint8)
    out[0, :, :3] = np.round(rgb * 255)
    out[0, :, 3] = 255
    return out


def legend_ticks(kind: str, velocity_span_mps: float = DEFAULT_VELOCITY_SPAN_MPS,
                 snr_range_db=DEFAULT_SNR_RANGE_DB, map_limits_db=(0.0, 40.0)) -> tuple[str, list[tuple[float, str]]]:
    """(title, [(fraction along the bar, label)])."""
    if kind == "velocity":
        s = velocity_span_mps
        return ("radial velocity (m/s)", [(0.0, f"−{s:g}"), (0.25, f"−{s / 2:g}"), (0.5, "0"),
                                          (0.75, f"+{s / 2:g}"), (1.0, f"+{s:g}")])
    if kind == "snr":
        lo, hi = snr_range_db
        return ("SNR (dB)", [(0.0, f"{lo:g}"), (0.5, f"{(lo + hi) / 2:g}"), (1.0, f"{hi:g}")])
    lo, hi = map_limits_db
    step = nice_step(hi - lo, 4)
    values = np.arange(math.ceil(lo / step) * step, hi + 1e-6, step)
    ticks = [(float((v - lo) / (hi - lo)), _fmt_num(v)) for v in values]
    return ("dB over noise floor", ticks)
