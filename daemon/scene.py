"""Scene description for the simulator: point targets with straight-line motion.

A scene file is TOML (our own layout, see README "Scene description"):

    [scene]
    name = "loading yard"
    frame = "sensor"                   # or "platform": positions on the platform, seen through the
                                       # sensor file's [pose] (default "sensor")

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

Impossible values are refused, naming the file, the target and the field: azimuth outside
[-180, 180] deg, elevation outside [-90, 90] deg, a speed of light or more (velocity_mps or
radial_velocity_mps), a target at the sensor origin, and an RCS outside [-80, 80] dBsm (from memory:
insects about -30 dBsm, people about 0, cars 10..20, large ships about 50..60; a value beyond is
a square-metre figure written as dBsm, and the error says what it would be in dBsm).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import Document, Section, parse_toml, read_toml

SPEED_OF_LIGHT_MPS = 299_792_458.0  # as sensor.py (not imported: the scene does not depend on a sensor)
RCS_DBSM_LIMITS = (-80.0, 80.0)


@dataclass(frozen=True)
class Target:
    name: str
    position_m: np.ndarray  # [3] at t = 0
    velocity_mps: np.ndarray  # [3]
    rcs_dbsm: float
    snr_db: float | None  # explicit per-sample, per-channel SNR; None = radar range equation


SCENE_FRAMES = ("sensor", "platform")


@dataclass(frozen=True)
class Scene:
    name: str
    source_text: str
    targets: tuple[Target, ...]
    frame: str = "sensor"  # the frame of the targets' positions and velocities (SCENE_FRAMES)

    def in_sensor_frame(self, rotation: np.ndarray, position_m: np.ndarray) -> "Scene":
        """The scene as a sensor with this pose sees it (platform = rotation @ sensor + position_m):
        a platform-frame scene's positions p become rotation^T (p - position_m), its velocities
        rotation^T v. A sensor-frame scene is returned as it is."""
        if self.frame == "sensor":
            return self
        r = np.asarray(rotation, np.float64)
        moved = tuple(Target(t.name, r.T @ (t.position_m - position_m), r.T @ t.velocity_mps, t.rcs_dbsm, t.snr_db)
                      for t in self.targets)
        return Scene(self.name, self.source_text, moved, "sensor")

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


CARTESIAN_FIELDS = ("position_m", "velocity_mps")
POLAR_FIELDS = ("range_m", "azimuth_deg", "elevation_deg", "radial_velocity_mps")
COMMON_FIELDS = ("name", "rcs_dbsm", "snr_db")


def _read_target(t: Section, index: int, frame: str) -> Target:
    t.check_unknown(CARTESIAN_FIELDS + POLAR_FIELDS + COMMON_FIELDS)
    name = t.string("name", f"target {index}")
    if t.has("name"):
        t.label += f" ({name})"
    if set(t.table) & set(CARTESIAN_FIELDS) and set(t.table) & set(POLAR_FIELDS):
        raise t.error("mixes the Cartesian fields position_m/velocity_mps with the polar fields range_m/"
                      "azimuth_deg/elevation_deg/radial_velocity_mps: give either, not both")
    if t.has("position_m"):
        pos = np.asarray(t.numbers("position_m", length=3), np.float64)
        if frame == "sensor" and np.linalg.norm(pos) <= 0:  # on a platform: the simulator checks the antennas
            raise t.fail("position_m", t.table["position_m"], "a target cannot sit at the sensor origin")
        vel = np.asarray(t.numbers("velocity_mps", [0.0, 0.0, 0.0], length=3), np.float64)
        if np.linalg.norm(vel) >= SPEED_OF_LIGHT_MPS:
            raise t.fail("velocity_mps", t.table["velocity_mps"],
                         f"a speed of {np.linalg.norm(vel):.6g} m/s, not below the speed of light")
    else:  # r > 0, so the position is never the origin
        r = t.number("range_m", gt=0)
        az = t.number("azimuth_deg", 0.0, ge=-180, le=180)
        el = t.number("elevation_deg", 0.0, ge=-90, le=90)
        pos = polar_to_cartesian(r, az, el)
        vr = t.number("radial_velocity_mps", 0.0)
        if abs(vr) >= SPEED_OF_LIGHT_MPS:
            raise t.fail("radial_velocity_mps", t.table["radial_velocity_mps"], "is not below the speed of light")
        vel = pos / r * vr
    return Target(name, pos, vel, _rcs_dbsm(t), t.number("snr_db", None))


def _rcs_dbsm(t: Section) -> float:
    rcs = t.number("rcs_dbsm", 0.0)
    low, high = RCS_DBSM_LIMITS
    if not low <= rcs <= high:
        as_m2 = f"; {rcs:g} m^2 would be {10.0 * math.log10(rcs):.1f} dBsm" if rcs > 0 else ""
        raise t.fail("rcs_dbsm", t.table["rcs_dbsm"],
                     f"must be in [{low:g}, {high:g}] dBsm (people are about 0 dBsm, cars 10..20, large ships "
                     f"about 50..60){as_m2}")
    return rcs


def scene_from_document(doc: Document) -> Scene:
    """Validate a parsed scene: an optional [scene] (its name) and one or more [[target]]."""
    doc.check_sections(("scene", "target"))
    head = doc.section("scene", required=False)
    name = head.string("name", "unnamed scene")
    frame = head.choice("frame", SCENE_FRAMES, "sensor")
    head.check_unknown()
    targets = tuple(_read_target(t, i, frame) for i, t in enumerate(doc.tables("target")))
    if not targets:
        raise doc.error("a scene needs at least one [[target]]")
    return Scene(name=name, source_text=doc.text, targets=targets, frame=frame)


def parse_scene(text: str, origin: str | None = None) -> Scene:
    return scene_from_document(parse_toml(text, origin))


def load_scene(path: str | Path) -> Scene:
    return scene_from_document(read_toml(path, "scene"))
