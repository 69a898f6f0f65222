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

Optional board impairments (README "Scene description"; the signal models are in simulate.py):

    [[interferer]]                     # another FMCW sensor transmitting nearby (any number)
    name = "dock 4 sensor"
    position_m = [9.0, 20.0, 0.5]     # in the scene's frame; static
    start_frequency_hz = 77.2e9
    slope_hz_per_s = 22.0e12           # any sign; 0 = a CW transmitter
    ramp_time_s = 40.0e-6              # active sweep
    chirp_period_s = 50.0e-6           # >= ramp_time_s
    chirps = 64                        # chirps per burst; 0 = continuous (then no frame_period_s)
    frame_period_s = 0.1001            # burst period (>= chirps x chirp_period_s)
    start_time_s = 1.0e-3              # its first chirp's start, from our frame 0's first chirp
    inr_db = 25.0                      # per-sample interference-to-noise ratio at our ADC while in
                                       # band, before the IF filter ...
    # eirp_dbm = 20.0                  # ... or its EIRP: one-way Friis link to our receiver

    [impairments]                      # the simulated board's receiver; every field optional
    dc_offset_counts = [[3.0, -2.0], [0, 0], [1.5, 1.5], [-4, 0]]   # [i, q] per RX, or one [i, q] for all
    iq_gain_db = [0.5, 0.0, -0.3, 0.2]   # Q-branch gain error per RX (or one number for all)
    iq_phase_deg = [3.0, 0.0, -2.0, 1.0] # Q-branch phase error per RX (or one number for all)
    leakage_level_dbfs = -30.0         # TX-to-RX leakage: a static return of this amplitude ...
    leakage_delay_s = 0.5e-9           # ... and this delay (both or neither)
    phase_noise_dbc_per_hz = -85.0     # the LO's phase noise L(f) at ...
    phase_noise_offset_hz = 1.0e6      # ... this offset (both or neither)

Per-RX lists are checked against the sensor's RX count by the simulator (Simulator raises a
CubecastError naming the scene file, [impairments], the field and the count).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
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


@dataclass(frozen=True)
class Interferer:
    """Another FMCW sensor transmitting nearby: its chirp q of burst p starts at
    start_time_s + p * frame_period_s + q * chirp_period_s (q < chirps; chirps = 0: every
    q * chirp_period_s, continuously) and sweeps start_frequency_hz + slope_hz_per_s * u for
    0 <= u < ramp_time_s. Exactly one of inr_db and eirp_dbm is set."""

    name: str
    position_m: np.ndarray  # [3], static
    start_frequency_hz: float
    slope_hz_per_s: float
    ramp_time_s: float
    chirp_period_s: float
    chirps: int  # per burst; 0 = continuous
    frame_period_s: float | None  # None when continuous
    start_time_s: float
    inr_db: float | None
    eirp_dbm: float | None


@dataclass(frozen=True)
class Impairments:
    """The simulated receiver's impairments ([impairments]); None = absent. Per-RX arrays have one
    row per RX, or a single row meaning every RX (the simulator checks the count)."""

    dc_offset_counts: np.ndarray | None = None  # [n, 2] (i, q) in ADC counts
    iq_gain_db: np.ndarray | None = None  # [n] Q-branch gain error
    iq_phase_deg: np.ndarray | None = None  # [n] Q-branch phase error
    leakage_level_dbfs: float | None = None  # amplitude of the leakage tone over the ADC full scale
    leakage_delay_s: float | None = None
    where: str = "[impairments]"  # file and section, for the simulator's messages
    phase_noise_dbc_per_hz: float | None = None  # the LO's single-sideband phase noise L(f) ...
    phase_noise_offset_hz: float | None = None  # ... at this offset (a Wiener phase: L falls as 1/f^2)

    @property
    def any(self) -> bool:
        return any(v is not None for v in (self.dc_offset_counts, self.iq_gain_db, self.iq_phase_deg,
                                           self.leakage_level_dbfs, self.phase_noise_dbc_per_hz))


SCENE_FRAMES = ("sensor", "platform")


@dataclass(frozen=True)
class Scene:
    name: str
    source_text: str
    targets: tuple[Target, ...]
    frame: str = "sensor"  # the frame of the targets' positions and velocities (SCENE_FRAMES)
    interferers: tuple[Interferer, ...] = ()
    impairments: Impairments | None = None
    origin: str | None = None  # the file (for messages)

    @property
    def impaired(self) -> bool:
        """The scene has an interferer or an impairment: the simulated capture's ground truth then
        carries the interference and clipping truth in every case."""
        return bool(self.interferers) or (self.impairments is not None and self.impairments.any)

    def in_sensor_frame(self, rotation: np.ndarray, position_m: np.ndarray) -> "Scene":
        """The scene as a sensor with this pose sees it (platform = rotation @ sensor + position_m):
        a platform-frame scene's positions p become rotation^T (p - position_m), its velocities
        rotation^T v. A sensor-frame scene is returned as it is."""
        if self.frame == "sensor":
            return self
        r = np.asarray(rotation, np.float64)
        moved = tuple(Target(t.name, r.T @ (t.position_m - position_m), r.T @ t.velocity_mps, t.rcs_dbsm, t.snr_db)
                      for t in self.targets)
        others = tuple(replace(i, position_m=r.T @ (i.position_m - position_m)) for i in self.interferers)
        return Scene(self.name, self.source_text, moved, "sensor", others, self.impairments, self.origin)

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


INTERFERER_FIELDS = ("name", "position_m", "start_frequency_hz", "slope_hz_per_s", "ramp_time_s", "chirp_period_s",
                     "chirps", "frame_period_s", "start_time_s", "inr_db", "eirp_dbm")


def _read_interferer(f: Section, index: int) -> Interferer:
    f.check_unknown(INTERFERER_FIELDS)
    name = f.string("name", f"interferer {index}")
    if f.has("name"):
        f.label += f" ({name})"
    pos = np.asarray(f.numbers("position_m", length=3), np.float64)
    start = f.number("start_frequency_hz", ge=1e9, le=3e11)  # 1..300 GHz: a figure outside is a unit slip
    slope = f.number("slope_hz_per_s")
    ramp = f.number("ramp_time_s", gt=0, le=0.1)
    period = f.number("chirp_period_s", ge=ramp, le=1.0)
    chirps = f.integer("chirps", ge=0)
    if chirps == 0:
        if f.has("frame_period_s"):
            raise f.fail("frame_period_s", f.table["frame_period_s"],
                         "has no meaning with chirps = 0 (a continuous interferer): leave it out")
        frame_period = None
    else:
        frame_period = f.number("frame_period_s", ge=chirps * period)
        if frame_period > 3600.0:
            raise f.fail("frame_period_s", frame_period, "must be <= 3600 (an hour between bursts)")
    t0 = f.number("start_time_s", 0.0)
    if f.has("inr_db") == f.has("eirp_dbm"):
        raise f.error("needs exactly one of inr_db (per-sample interference-to-noise ratio at the ADC) and "
                      "eirp_dbm (its EIRP, through the one-way link)")
    inr = f.number("inr_db", None, ge=-50, le=150)
    eirp = f.number("eirp_dbm", None, ge=-100, le=100)
    return Interferer(name, pos, start, slope, ramp, period, chirps, frame_period, t0, inr, eirp)


IMPAIRMENT_FIELDS = ("dc_offset_counts", "iq_gain_db", "iq_phase_deg", "leakage_level_dbfs", "leakage_delay_s",
                     "phase_noise_dbc_per_hz", "phase_noise_offset_hz")
IQ_GAIN_DB_LIMIT = 6.0  # a Q branch 2x off in amplitude is a broken receiver, not an imbalance
IQ_PHASE_DEG_LIMIT = 45.0  # the correction divides by cos(phi)


def _per_rx_numbers(f: Section, name: str, limit: float) -> np.ndarray | None:
    """One number for every RX or a list of one per RX, each in [-limit, limit]."""
    if not f.has(name):
        return None
    value = f.raw(name)
    vals = [f.number(name, ge=-limit, le=limit)] if not isinstance(value, list) else f.numbers(name)
    bad = [v for v in vals if abs(v) > limit]
    if bad:
        raise f.fail(name, value, f"every value must be in [{-limit:g}, {limit:g}]")
    return np.asarray(vals, np.float64)


def _read_impairments(f: Section) -> Impairments | None:
    f.check_unknown(IMPAIRMENT_FIELDS)
    if not f.table:
        return None
    dc = None
    if f.has("dc_offset_counts"):
        value = f.raw("dc_offset_counts")
        if isinstance(value, list) and value and all(isinstance(v, list) for v in value):
            dc = np.asarray(f.number_rows("dc_offset_counts", 2, columns="i, q"), np.float64)
        else:
            dc = np.asarray(f.numbers("dc_offset_counts", length=2), np.float64)[None, :]
    level = f.number("leakage_level_dbfs", None, le=20)
    delay = f.number("leakage_delay_s", None, ge=0, le=1e-6)  # on the board or in the radome: well under 1 us
    if (level is None) != (delay is None):
        raise f.error("leakage needs both leakage_level_dbfs and leakage_delay_s")
    pn_level = f.number("phase_noise_dbc_per_hz", None, ge=-200, le=-20)
    pn_offset = f.number("phase_noise_offset_hz", None, gt=0, le=1e9)
    if (pn_level is None) != (pn_offset is None):
        raise f.error("phase noise needs both phase_noise_dbc_per_hz and phase_noise_offset_hz")
    where = f"{f.origin}: [impairments]" if f.origin else "[impairments]"
    return Impairments(dc, _per_rx_numbers(f, "iq_gain_db", IQ_GAIN_DB_LIMIT),
                       _per_rx_numbers(f, "iq_phase_deg", IQ_PHASE_DEG_LIMIT), level, delay, where,
                       pn_level, pn_offset)


def scene_from_document(doc: Document) -> Scene:
    """Validate a parsed scene: an optional [scene] (its name), one or more [[target]], optional
    [[interferer]] and [impairments]."""
    doc.check_sections(("scene", "target", "interferer", "impairments"))
    head = doc.section("scene", required=False)
    name = head.string("name", "unnamed scene")
    frame = head.choice("frame", SCENE_FRAMES, "sensor")
    head.check_unknown()
    targets = tuple(_read_target(t, i, frame) for i, t in enumerate(doc.tables("target")))
    if not targets:
        raise doc.error("a scene needs at least one [[target]]")
    interferers = tuple(_read_interferer(f, i) for i, f in enumerate(doc.tables("interferer")))
    impairments = _read_impairments(doc.section("impairments", required=False))
    return Scene(name=name, source_text=doc.text, targets=targets, frame=frame, interferers=interferers,
                 impairments=impairments, origin=doc.origin)


def parse_scene(text: str, origin: str | None = None) -> Scene:
    return scene_from_document(parse_toml(text, origin))


def load_scene(path: str | Path) -> Scene:
    return scene_from_document(read_toml(path, "scene"))
