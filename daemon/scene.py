"""Scene description for the simulator: point targets with straight-line motion.

A scene file is TOML (our own layout, see README "Scene description"):

    [scene]
    name = "loading yard"

    [[target]]
    name = "forklift mast"
    position_m = [-6.0, 9.0, 1.5]     # x right, y boresight, z up, at t = 0
    velocity_mps = [1.5, 0.0, 0.0]
    rcs_dbsm = 5.0

    [[target]]
    name = "walker"
    range_m = 14.0                     # or polar: range, azimuth, elevation at t = 0 ...
    azimuth_deg = 12.0
    elevation_deg = 0.0
    radial_velocity_mps = -1.3         # ... moving along the line of sight
    rcs_dbsm = -5.0
    snr_db = 10.0                      # optional: per-sample SNR on one channel, overrides the range equation
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import CubecastError


@dataclass(frozen=True)
class Target:
    name: str
    position_m: np.ndarray  # [3] at t = 0
    velocity_mps: np.ndarray  # [3]
    rcs_dbsm: float
    snr_db: float | None  # explicit per-sample, per-channel SNR; None = radar range equation


@dataclass(frozen=True)
class Scene:
    name: str
    source_text: str
    targets: tuple[Target, ...]

    def positions_at(self, t_s: np.ndarray) -> np.ndarray:
        """Target positions [n_t, len(t), 3] at times t_s (seconds from the scene start)."""
        p0 = np.stack([t.position_m for t in self.targets])
        v = np.stack([t.velocity_mps for t in self.targets])
        return p0[:, None, :] + v[:, None, :] * np.asarray(t_s, np.float64)[None, :, None]


def polar_to_cartesian(range_m: float, azimuth_deg: float, elevation_deg: float) -> np.ndarray:
    """Sensor frame: x = r cos(el) sin(az), y = r cos(el) cos(az), z = r sin(el)."""
    az, el = math.radians(azimuth_deg), math.radians(elevation_deg)
    return np.array([range_m * math.cos(el) * math.sin(az), range_m * math.cos(el) * math.cos(az),
                     range_m * math.sin(el)])


def _vector(value, where: str) -> np.ndarray:
    if (not isinstance(value, list) or len(value) != 3
            or any(isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) for v in value)):
        raise CubecastError(f"{where} = {value!r}: must be a list of 3 finite numbers [x, y, z]")
    return np.asarray(value, np.float64)


def _number(table: dict, key: str, where: str, default=...) -> float:
    if key not in table:
        if default is ...:
            raise CubecastError(f"{where} {key} is missing")
        return default
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise CubecastError(f"{where} {key} = {value!r}: must be a finite number")
    return float(value)


def parse_scene(text: str, origin: str | None = None) -> Scene:
    pre = f"{origin}: " if origin else ""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CubecastError(f"{pre}not valid TOML: {exc}") from None
    unknown = sorted(set(doc) - {"scene", "target"})
    if unknown:
        raise CubecastError(f"{pre}unknown section(s) {', '.join(unknown)}")
    head = doc.get("scene", {})
    name = head.get("name", "unnamed scene") if isinstance(head, dict) else None
    if not isinstance(name, str):
        raise CubecastError(f"{pre}[scene] name must be a string")
    raw_targets = doc.get("target", [])
    if not isinstance(raw_targets, list) or not raw_targets:
        raise CubecastError(f"{pre}a scene needs at least one [[target]]")
    cart = {"position_m", "velocity_mps"}
    polar = {"range_m", "azimuth_deg", "elevation_deg", "radial_velocity_mps"}
    common = {"name", "rcs_dbsm", "snr_db"}
    targets = []
    for i, t in enumerate(raw_targets):
        where = f"{pre}[[target]] #{i}" + (f" ({t.get('name')})" if isinstance(t, dict) and "name" in t else "")
        if not isinstance(t, dict):
            raise CubecastError(f"{where}: must be a table")
        extra = sorted(set(t) - cart - polar - common)
        if extra:
            raise CubecastError(f"{where}: unknown field(s) {', '.join(extra)}")
        if set(t) & cart and set(t) & polar:
            raise CubecastError(f"{where}: give either position_m/velocity_mps or range_m/azimuth_deg/"
                                f"elevation_deg/radial_velocity_mps, not both")
        if "position_m" in t:
            pos = _vector(t["position_m"], f"{where} position_m")
            vel = _vector(t.get("velocity_mps", [0.0, 0.0, 0.0]), f"{where} velocity_mps")
        else:
            r = _number(t, "range_m", where)
            if r <= 0:
                raise CubecastError(f"{where} range_m = {r}: must be greater than zero")
            az = _number(t, "azimuth_deg", where, 0.0)
            el = _number(t, "elevation_deg", where, 0.0)
            if not -90 <= el <= 90:
                raise CubecastError(f"{where} elevation_deg = {el}: must be within -90..90")
            pos = polar_to_cartesian(r, az, el)
            vel = pos / r * _number(t, "radial_velocity_mps", where, 0.0)
        if np.linalg.norm(pos) <= 0:
            raise CubecastError(f"{where}: a target cannot sit at the sensor origin")
        rcs = _number(t, "rcs_dbsm", where, 0.0)
        snr = _number(t, "snr_db", where, None)
        tname = t.get("name", f"target {i}")
        if not isinstance(tname, str):
            raise CubecastError(f"{where} name must be a string")
        targets.append(Target(tname, pos, vel, rcs, snr))
    return Scene(name=name, source_text=text, targets=tuple(targets))


def load_scene(path: str | Path) -> Scene:
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise CubecastError(f"cannot read scene {path}: {exc.strerror}") from None
    return parse_scene(text, str(path))
