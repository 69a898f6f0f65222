"""Sensor description: load a TOML file, validate it, derive the figures once.

The file format is cubecast's own (see README, "Sensor description"). Every quantity is SI with the
unit in its name. Positions are in the sensor frame: x right, y boresight, z up.

Derived figures follow the textbook FMCW relations (Richards, Fundamentals of Radar Signal
Processing, 2005; common practice):
  range resolution      dR   = c / (2 B)          with B = S * N / fs, the sweep inside the ADC window
  maximum range         Rmax = fs_IF * c / (2 S)  fs_IF = fs (complex sampling) or fs / 2 (real)
  velocity resolution   dv   = lambda / (2 N_loops T_loop)
  unambiguous velocity  vmax = lambda / (4 T_loop), T_loop = N_slots * T_c (TDM divides by N_tx)

The receiver's IF low-pass filter (optional section [if_filter]) is an analog Butterworth low-pass
of order N and cutoff fc (Butterworth, "On the theory of filter amplifiers", 1930; common practice
for anti-alias filters), magnitude response |H(f)| = 1 / sqrt(1 + (f / fc)^(2N)). The simulator
weights each echo by |H| at its beat frequency, so an echo from beyond the maximum range is
attenuated before it folds into the band, as on a board. Its phase response (a delay, calibrated
out as range bias) is not modelled. Defaults: order 8 at 1.2 x the IF band edge (the sample rate
for complex sampling, half of it for real): in the band the loss stays below 0.02 dB up to 85 % of
the maximum range (where the accuracy trials draw their targets) and is 0.23 dB at the band edge,
while an echo at twice the band edge's beat frequency, whose alias would land in the band, loses
35.5 dB and one at 2.4 times 48 dB. A board's own figures belong in the file; these defaults are our
choice, a steep filter that leaves the band as it was.

Values no FMCW front end takes (a carrier of 77 Hz, a slope of 30 Hz/s: unit slips) are refused with
the unit that was probably meant; the limits and their reasons are in sensorlimits.py.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from . import sensorlimits
from .config import Document, Section, parse_toml, read_toml
from .errors import CubecastError
from .wire import SENSOR_ID_PATTERN, SENSOR_ID_RULE, pose_rotation  # noqa: F401 (pose_rotation: also ours)

SPEED_OF_LIGHT_MPS = 299_792_458.0
BOLTZMANN_J_PER_K = 1.380649e-23
REFERENCE_TEMPERATURE_K = 290.0

ADC_SAMPLE_TYPES = ("int16", "float32")
ADC_FORMATS = ("complex", "real")
MIMO_SCHEMES = ("tdm", "bpm")
IF_FILTER_DEFAULT_ORDER = 8
IF_FILTER_DEFAULT_CUTOFF_PER_BAND = 1.2  # default cutoff, in multiples of the IF band edge


@dataclass(frozen=True)
class AdcFormat:
    """How samples arrive from the ADC, and how they map to the canonical complex frame."""

    sampling: str  # "complex" or "real"
    sample_type: str  # "int16" or "float32"
    full_scale: float  # largest magnitude a sample component can take (counts)
    swap_iq: bool
    conjugate: bool

    @property
    def is_complex(self) -> bool:
        return self.sampling == "complex"

    def raw_shape(self, n_chirps: int, n_rx: int, n_samples: int) -> tuple[int, ...]:
        """Shape of one frame as stored in a capture: int16 I/Q pairs get a trailing axis of 2."""
        if self.is_complex and self.sample_type == "int16":
            return (n_chirps, n_rx, n_samples, 2)
        return (n_chirps, n_rx, n_samples)

    def raw_dtype(self) -> np.dtype:
        if self.sample_type == "int16":
            return np.dtype("<i2")
        return np.dtype("<c8") if self.is_complex else np.dtype("<f4")


@dataclass(frozen=True)
class Sensor:
    """A validated sensor description with its derived figures (computed once, at load)."""

    sensor_id: str
    source_text: str
    # chirp
    start_frequency_hz: float
    slope_hz_per_s: float
    sample_rate_hz: float
    samples_per_chirp: int
    adc_start_delay_s: float
    ramp_end_time_s: float
    chirp_period_s: float
    design_max_range_m: float
    # frame
    chirps_per_frame: int
    frame_period_s: float
    # antennas, metres, sensor frame, shape [n, 3]
    tx_positions_m: np.ndarray
    rx_positions_m: np.ndarray
    fov_half_azimuth_deg: float
    fov_half_elevation_deg: float
    mount_height_m: float | None  # height of the sensor above the ground, if known (for displays)
    # link budget
    tx_power_dbm: float
    tx_gain_dbi: float
    rx_gain_dbi: float
    noise_figure_db: float
    system_loss_db: float
    noise_rms_counts: float
    # mimo: code[slot, tx] in {0, +1, -1}; chirp m uses slot m % n_slots
    mimo_scheme: str
    mimo_code: np.ndarray
    adc: AdcFormat
    # receiver IF low-pass: Butterworth of this order and cutoff (defaults when the file has no [if_filter])
    if_cutoff_hz: float
    if_filter_order: int
    if_filter_default: bool
    # pose on the platform ([pose]; identity when the file has none): platform = rotation @ sensor + position
    pose_position_m: np.ndarray  # [3], the sensor origin in the platform frame
    pose_yaw_deg: float
    pose_pitch_deg: float
    pose_roll_deg: float
    pose_rotation: np.ndarray  # [3, 3], sensor-frame vectors -> platform-frame vectors
    has_pose: bool
    digest: str = field(default="")

    # ---- derived figures -------------------------------------------------------------
    @property
    def array_digest(self) -> str:
        """16-hex digest of what an array calibration depends on: the carrier and IF (start
        frequency, slope, sample rate, samples per chirp, ADC start delay), the antenna positions,
        the MIMO code and the ADC format. Not the id, frame, link budget, IF filter (a magnitude
        common to every channel, modelled without phase), field of view or mount height: editing
        those keeps a calibration valid, where `digest` (the whole description) changes."""
        doc = {
            "chirp": [self.start_frequency_hz, self.slope_hz_per_s, self.sample_rate_hz, self.samples_per_chirp,
                      self.adc_start_delay_s],
            # picometre rounding: the same positions given in metres or in half-wavelengths agree
            "tx": np.round(self.tx_positions_m, 12).tolist(),
            "rx": np.round(self.rx_positions_m, 12).tolist(),
            "mimo": [self.mimo_scheme, self.mimo_code.tolist()],
            "adc": [self.adc.sampling, self.adc.sample_type, self.adc.full_scale, self.adc.swap_iq,
                    self.adc.conjugate],
        }
        return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()[:16]

    @property
    def n_tx(self) -> int:
        return self.tx_positions_m.shape[0]

    @property
    def n_rx(self) -> int:
        return self.rx_positions_m.shape[0]

    @property
    def n_slots(self) -> int:
        return self.mimo_code.shape[0]

    @property
    def n_loops(self) -> int:
        return self.chirps_per_frame // self.n_slots

    @property
    def n_virtual(self) -> int:
        return self.n_tx * self.n_rx

    @property
    def adc_window_s(self) -> float:
        return self.samples_per_chirp / self.sample_rate_hz

    @property
    def bandwidth_hz(self) -> float:
        """Sweep inside the ADC window: the bandwidth that sets range resolution."""
        return self.slope_hz_per_s * self.adc_window_s

    @property
    def center_frequency_hz(self) -> float:
        """Centre of the sampled part of the sweep; its wavelength is the design wavelength."""
        return self.start_frequency_hz + self.slope_hz_per_s * (self.adc_start_delay_s + 0.5 * self.adc_window_s)

    @property
    def wavelength_m(self) -> float:
        return SPEED_OF_LIGHT_MPS / self.center_frequency_hz

    @property
    def range_resolution_m(self) -> float:
        return SPEED_OF_LIGHT_MPS / (2.0 * self.bandwidth_hz)

    @property
    def if_bandwidth_hz(self) -> float:
        return self.sample_rate_hz if self.adc.is_complex else 0.5 * self.sample_rate_hz

    @property
    def max_range_m(self) -> float:
        return self.if_bandwidth_hz * SPEED_OF_LIGHT_MPS / (2.0 * self.slope_hz_per_s)

    def beat_frequency_hz(self, range_m):
        """Beat frequency of an echo from range_m: 2 S R / c."""
        return 2.0 * self.slope_hz_per_s * np.asarray(range_m, np.float64) / SPEED_OF_LIGHT_MPS

    def if_filter_gain(self, beat_hz):
        """Amplitude response |H(f)| = 1 / sqrt(1 + (f / fc)^(2N)) of the IF low-pass (Butterworth 1930)."""
        ratio = np.abs(np.asarray(beat_hz, np.float64)) / self.if_cutoff_hz
        with np.errstate(over="ignore"):  # far out of band the power overflows to inf: the gain is 0
            return 1.0 / np.sqrt(1.0 + ratio ** (2 * self.if_filter_order))

    @property
    def n_range_bins(self) -> int:
        """Range bins the chain keeps (before zero padding): all for complex, the lower half for real."""
        return self.samples_per_chirp if self.adc.is_complex else self.samples_per_chirp // 2

    @property
    def loop_period_s(self) -> float:
        return self.n_slots * self.chirp_period_s

    @property
    def velocity_resolution_mps(self) -> float:
        return self.wavelength_m / (2.0 * self.n_loops * self.loop_period_s)

    @property
    def max_velocity_mps(self) -> float:
        """Unambiguous radial velocity (+-) after MIMO demultiplexing: lambda / (4 T_loop)."""
        return self.wavelength_m / (4.0 * self.loop_period_s)

    @property
    def max_velocity_unfolded_mps(self) -> float:
        """Reach of TDM velocity unfolding: N_tx hypotheses widen the interval N_slots times."""
        return self.wavelength_m / (4.0 * self.chirp_period_s)

    @property
    def chirp_duty_cycle(self) -> float:
        return self.ramp_end_time_s / self.chirp_period_s

    @property
    def frame_duty_cycle(self) -> float:
        return self.chirps_per_frame * self.chirp_period_s / self.frame_period_s

    @property
    def virtual_positions_m(self) -> np.ndarray:
        """[n_tx * n_rx, 3]: channel v = k * n_rx + l sits at tx_k + rx_l (two-way phase centre)."""
        return (self.tx_positions_m[:, None, :] + self.rx_positions_m[None, :, :]).reshape(-1, 3)

    def virtual_array(self) -> dict[str, Any]:
        """Unique and redundant elements on the half-wavelength grid, apertures, Rayleigh resolution."""
        half = self.wavelength_m / 2.0
        pos = self.virtual_positions_m
        cells = np.round(pos[:, [0, 2]] / half).astype(int)
        unique = np.unique(cells, axis=0)
        aperture_az_m = float(np.ptp(pos[:, 0]))
        aperture_el_m = float(np.ptp(pos[:, 2]))
        n_az = int(np.unique(cells[:, 0]).size)
        n_el = int(np.unique(cells[:, 1]).size)

        def rayleigh_deg(n: int, aperture_m: float) -> float | None:
            # Rayleigh limit in sine space: lambda / L with L = N * d (common practice, 2/N at d = lambda/2).
            # None without an aperture that resolves: one row, or lambda / L >= 1 (two elements lambda / 2
            # apart), where the first null lies outside the visible region and no two sources are resolved
            if n < 2:
                return None
            span = aperture_m + half  # N elements at pitch d span (N-1) d; the beam uses N d
            sine = self.wavelength_m / span
            return math.degrees(math.asin(sine)) if sine < 1.0 else None

        return {
            "positions_m": pos.tolist(),
            "positions_half_wavelength": ((pos / half).round(6) + 0.0).tolist(),  # + 0.0: no -0.0
            "elements": int(pos.shape[0]),
            "unique_elements": int(unique.shape[0]),
            "redundant_elements": int(pos.shape[0] - unique.shape[0]),
            "azimuth_columns": n_az,
            "elevation_rows": n_el,
            "azimuth_aperture_m": aperture_az_m,
            "elevation_aperture_m": aperture_el_m,
            "azimuth_resolution_deg": rayleigh_deg(n_az, aperture_az_m),
            "elevation_resolution_deg": rayleigh_deg(n_el, aperture_el_m),
        }

    def describe(self) -> dict[str, Any]:
        """The derived figures as plain JSON-able values (no negative zero anywhere)."""
        return _plain_zero({
            "sensor_id": self.sensor_id,
            "digest": self.digest,
            "wavelength_m": self.wavelength_m,
            "center_frequency_hz": self.center_frequency_hz,
            "half_wavelength_m": self.wavelength_m / 2.0,
            "bandwidth_hz": self.bandwidth_hz,
            "range_resolution_m": self.range_resolution_m,
            "max_range_m": self.max_range_m,
            "range_bins": self.n_range_bins,
            "velocity_resolution_mps": self.velocity_resolution_mps,
            "max_velocity_mps": self.max_velocity_mps,
            "max_velocity_unfolded_mps": self.max_velocity_unfolded_mps,
            "chirp_duty_cycle": self.chirp_duty_cycle,
            "frame_duty_cycle": self.frame_duty_cycle,
            "mimo_scheme": self.mimo_scheme,
            "n_tx": self.n_tx,
            "n_rx": self.n_rx,
            "loops_per_frame": self.n_loops,
            "chirps_per_frame": self.chirps_per_frame,
            "frame_period_s": self.frame_period_s,
            "mount_height_m": self.mount_height_m,
            "adc": {
                "sampling": self.adc.sampling,
                "sample_type": self.adc.sample_type,
                "full_scale": self.adc.full_scale,
                "swap_iq": self.adc.swap_iq,
                "conjugate": self.adc.conjugate,
            },
            "if_filter": {
                "kind": "butterworth",
                "order": self.if_filter_order,
                "cutoff_hz": self.if_cutoff_hz,
                "cutoff_range_m": self.if_cutoff_hz * SPEED_OF_LIGHT_MPS / (2.0 * self.slope_hz_per_s),
                "default": self.if_filter_default,
                "loss_at_max_range_db": -20.0 * math.log10(float(self.if_filter_gain(self.if_bandwidth_hz))),
            },
            "virtual_array": self.virtual_array(),
            "pose": self.pose_summary() | {"given": self.has_pose},
        })

    def pose_summary(self) -> dict:
        """The pose as plain numbers (wire `sensor` summary, describe)."""
        return {"position_m": [float(v) for v in self.pose_position_m], "yaw_deg": self.pose_yaw_deg,
                "pitch_deg": self.pose_pitch_deg, "roll_deg": self.pose_roll_deg}

    def to_platform(self, xyz_m: np.ndarray) -> np.ndarray:
        """Sensor-frame points [..., 3] in the platform frame."""
        return np.asarray(xyz_m, np.float64) @ self.pose_rotation.T + self.pose_position_m

    # ---- ADC format <-> canonical frame ---------------------------------------------
    def raw_to_canonical(self, raw: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Convert one frame in the sensor's ADC format to the canonical complex64 [chirp, rx, sample]."""
        shape = self.adc.raw_shape(self.chirps_per_frame, self.n_rx, self.samples_per_chirp)
        if raw.shape != shape or raw.dtype != self.adc.raw_dtype():
            raise CubecastError(
                f"frame has shape {raw.shape} dtype {raw.dtype}, sensor '{self.sensor_id}' expects "
                f"shape {shape} dtype {self.adc.raw_dtype()}"
            )
        canon_shape = (self.chirps_per_frame, self.n_rx, self.samples_per_chirp)
        if out is None:
            out = np.empty(canon_shape, np.complex64)
        if self.adc.is_complex:
            if self.adc.sample_type == "int16":
                i_part, q_part = raw[..., 0], raw[..., 1]
                if self.adc.swap_iq:
                    i_part, q_part = q_part, i_part
                out.real[...] = i_part
                out.imag[...] = q_part
            else:
                out[...] = raw
                if self.adc.swap_iq:
                    out.real[...], out.imag[...] = raw.imag, raw.real
            if self.adc.conjugate:
                np.conjugate(out, out=out)
        else:
            out.real[...] = raw
            out.imag[...] = 0.0
        return out

    def canonical_to_raw(self, frame: np.ndarray) -> np.ndarray:
        """Inverse of raw_to_canonical: quantise (int16, rounding and clipping at full scale) and
        apply the board's I/Q conventions. Used by the simulator to write captures as a board would."""
        fs = self.adc.full_scale
        data = np.conjugate(frame) if self.adc.conjugate else frame
        if not self.adc.is_complex:
            re = np.clip(data.real, -fs, fs)
            if self.adc.sample_type == "int16":
                return np.rint(re).astype("<i2")
            return re.astype("<f4")
        i_part, q_part = data.real, data.imag
        if self.adc.swap_iq:
            i_part, q_part = q_part, i_part
        if self.adc.sample_type == "int16":
            out = np.empty(frame.shape + (2,), "<i2")
            out[..., 0] = np.rint(np.clip(i_part, -fs, fs))
            out[..., 1] = np.rint(np.clip(q_part, -fs, fs))
            return out
        out = np.empty(frame.shape, "<c8")
        out.real = np.clip(i_part, -fs, fs)
        out.imag = np.clip(q_part, -fs, fs)
        return out


def _plain_zero(value: Any) -> Any:
    """`value` (nested dicts and lists) with every -0.0 written as 0.0: a position on an axis, or a
    value rounded to zero, prints as 0 (-0.0 + 0.0 is +0.0 in IEEE 754 round-to-nearest)."""
    if isinstance(value, dict):
        return {k: _plain_zero(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain_zero(v) for v in value]
    if isinstance(value, float):
        return value + 0.0
    return value


# ---- loading and validation -------------------------------------------------------------
# One reader per section, in the order the rules need them: each returns Sensor fields; rules
# across sections come after both are read.

SECTIONS = ("sensor", "chirp", "frame", "antennas", "link", "mimo", "adc", "if_filter", "pose")


def _read_id(s: Section) -> str:
    sensor_id = s.string("id", pattern=SENSOR_ID_PATTERN, rule=f"must be {SENSOR_ID_RULE}")
    s.string("description", "")
    s.check_unknown()
    return sensor_id


def _read_chirp(c: Section) -> dict[str, Any]:
    out = dict(
        start_frequency_hz=c.number("start_frequency_hz", gt=0),
        slope_hz_per_s=c.number("slope_hz_per_s", gt=0),
        sample_rate_hz=c.number("sample_rate_hz", gt=0),
        samples_per_chirp=c.integer("samples_per_chirp", ge=8),
        adc_start_delay_s=c.number("adc_start_delay_s", ge=0),
        ramp_end_time_s=c.number("ramp_end_time_s", gt=0),
        chirp_period_s=c.number("chirp_period_s", gt=0),
        design_max_range_m=c.number("design_max_range_m", 0.0, ge=0),
    )
    c.check_unknown()
    sensorlimits.check_chirp_fields(c, out)
    adc_end = out["adc_start_delay_s"] + out["samples_per_chirp"] / out["sample_rate_hz"]
    ramp_end = out["ramp_end_time_s"]
    if ramp_end < adc_end:
        raise c.fail("ramp_end_time_s", ramp_end,
                     f"the ramp must outlast the ADC window, which ends at adc_start_delay_s + "
                     f"samples_per_chirp / sample_rate_hz = {adc_end:.6g} s")
    if out["chirp_period_s"] < ramp_end:
        raise c.fail("chirp_period_s", out["chirp_period_s"], f"must be at least ramp_end_time_s = {ramp_end:.6g} s")
    sensorlimits.check_chirp_timing(c, out)
    return out


def _check_design_range(c: Section, chirp: dict[str, Any], adc: AdcFormat, if_filter: dict[str, Any]) -> None:
    """The beat frequency of a target at the design range, 2 S R / c, must lie in the IF band and
    below the IF filter's cutoff."""
    fs, slope, design_range = chirp["sample_rate_hz"], chirp["slope_hz_per_s"], chirp["design_max_range_m"]
    if_band = fs if adc.is_complex else fs / 2.0
    beat_hz = 2.0 * slope * design_range / SPEED_OF_LIGHT_MPS
    if design_range > 0 and beat_hz > if_band:
        raise c.fail("sample_rate_hz", fs,
                     f"too low for design_max_range_m = {design_range:g}: its beat frequency "
                     f"2 * slope * range / c = {beat_hz:.6g} Hz exceeds the IF band {if_band:.6g} Hz the ADC covers")
    if design_range > 0 and beat_hz > if_filter["if_cutoff_hz"]:
        raise c.fail("design_max_range_m", design_range,
                     f"its beat frequency {beat_hz:.6g} Hz lies above the IF filter's cutoff "
                     f"{if_filter['if_cutoff_hz']:.6g} Hz ([if_filter] cutoff_hz): echoes from there lose over 3 dB")


def _read_if_filter(f: Section, chirp: dict[str, Any], adc: AdcFormat) -> dict[str, Any]:
    """[if_filter] (optional): `order` (default IF_FILTER_DEFAULT_ORDER) and `cutoff_hz` (default
    IF_FILTER_DEFAULT_CUTOFF_PER_BAND x the IF band edge) of the receiver's Butterworth low-pass."""
    if_band = chirp["sample_rate_hz"] if adc.is_complex else chirp["sample_rate_hz"] / 2.0
    given = f.has("cutoff_hz") or f.has("order")
    order = f.integer("order", IF_FILTER_DEFAULT_ORDER, ge=1, le=sensorlimits.IF_ORDER_MAX)
    cutoff = f.number("cutoff_hz", IF_FILTER_DEFAULT_CUTOFF_PER_BAND * if_band, gt=0)
    f.check_unknown()
    sensorlimits.check_if_filter(f, cutoff, if_band)
    return dict(if_cutoff_hz=cutoff, if_filter_order=order, if_filter_default=not given)


def _read_frame(fr: Section, chirp_period_s: float) -> dict[str, Any]:
    chirps = fr.integer("chirps_per_frame", ge=1)
    frame_period = fr.number("frame_period_s", gt=0)
    fr.check_unknown()
    sensorlimits.check_frame_period(fr, frame_period)
    if chirps * chirp_period_s > frame_period:
        raise fr.fail("frame_period_s", frame_period,
                      f"must be at least chirps_per_frame * chirp_period_s = {chirps * chirp_period_s:.6g} s")
    return dict(chirps_per_frame=chirps, frame_period_s=frame_period)


def _read_adc(a: Section) -> AdcFormat:
    adc = AdcFormat(
        sampling=a.choice("sampling", ADC_FORMATS, "complex"),
        sample_type=a.choice("sample_type", ADC_SAMPLE_TYPES, "int16"),
        full_scale=a.number("full_scale", gt=0),
        swap_iq=a.boolean("swap_iq", False),
        conjugate=a.boolean("conjugate", False),
    )
    a.check_unknown()
    if adc.sample_type == "int16" and adc.full_scale > 32767:
        raise a.fail("full_scale", adc.full_scale, "int16 samples cannot exceed 32767")
    if not adc.is_complex and (adc.swap_iq or adc.conjugate):
        raise a.fail("swap_iq" if adc.swap_iq else "conjugate", True, "I/Q conventions apply to complex sampling only")
    return adc


def _positions(an: Section, which: str, half_wavelength_m: float) -> np.ndarray:
    """TX/RX positions: `{which}_positions_m = [[x, y, z], ...]` in metres, or the shorthand
    `{which}_positions_half_wavelength = [[x, z], ...]` in half design wavelengths on the x-z plane."""
    name_m, name_hw = f"{which}_positions_m", f"{which}_positions_half_wavelength"
    if an.has(name_m) == an.has(name_hw):
        raise an.error(f"give exactly one of {name_m} or {name_hw}")
    if an.has(name_m):
        return np.asarray(an.number_rows(name_m, 3, columns="x, y, z"), dtype=np.float64)
    arr = np.asarray(an.number_rows(name_hw, 2, columns="x, z"), dtype=np.float64)
    return np.stack([arr[:, 0], np.zeros(len(arr)), arr[:, 1]], axis=1) * half_wavelength_m


def _read_antennas(an: Section, chirp: dict[str, Any]) -> dict[str, Any]:
    # positions in half wavelengths use the design wavelength: the centre of the sampled sweep
    center = chirp["start_frequency_hz"] + chirp["slope_hz_per_s"] * (
        chirp["adc_start_delay_s"] + 0.5 * chirp["samples_per_chirp"] / chirp["sample_rate_hz"])
    half_wavelength_m = SPEED_OF_LIGHT_MPS / center / 2.0
    out = dict(
        tx_positions_m=_positions(an, "tx", half_wavelength_m),
        rx_positions_m=_positions(an, "rx", half_wavelength_m),
        fov_half_azimuth_deg=an.number("fov_half_azimuth_deg", 60.0, gt=0, le=90),
        fov_half_elevation_deg=an.number("fov_half_elevation_deg", 20.0, gt=0, le=90),
        mount_height_m=an.number("mount_height_m", None, ge=0),
    )
    an.check_unknown()
    return out


def _read_pose(ps: Section) -> dict[str, Any]:
    """[pose]: where the sensor sits on its platform (optional; without it the platform frame is the
    sensor frame)."""
    given = bool(ps.table)
    position = ps.numbers("position_m", [0.0, 0.0, 0.0], length=3)
    angles = (ps.number("yaw_deg", 0.0, ge=-180, le=180), ps.number("pitch_deg", 0.0, ge=-90, le=90),
              ps.number("roll_deg", 0.0, ge=-180, le=180))
    ps.check_unknown()
    rotation = pose_rotation(*angles)
    return dict(pose_position_m=np.asarray(position, np.float64), pose_yaw_deg=float(angles[0]),
                pose_pitch_deg=float(angles[1]), pose_roll_deg=float(angles[2]), pose_rotation=rotation,
                has_pose=given)


def _read_mimo(m: Section, fr: Section, n_tx: int, chirps_per_frame: int) -> dict[str, Any]:
    """MIMO code[slot, tx]: TDM from the TX order (one TX per slot), BPM from the given sign codes."""
    scheme = m.choice("scheme", MIMO_SCHEMES)
    if scheme == "tdm":
        order = m.numbers("tx_order", list(range(n_tx)), integer=True)
        if sorted(order) != list(range(n_tx)):
            raise m.fail("tx_order", order, f"must name each of the {n_tx} TX (0..{n_tx - 1}) exactly once")
        code = np.zeros((n_tx, n_tx), np.float64)
        for slot, k in enumerate(order):
            code[slot, k] = 1.0
    else:
        code = np.asarray(m.number_rows("codes", n_tx, columns=f"{n_tx} signs, one per TX"), dtype=np.float64)
        codes = m.table["codes"]
        if not np.all(np.isin(code, (-1.0, 1.0))):
            raise m.fail("codes", codes, "BPM code entries must be +1 or -1")
        if code.shape[0] < n_tx or np.linalg.matrix_rank(code) < n_tx:
            raise m.fail("codes", codes, f"need at least {n_tx} slots with linearly independent codes to separate {n_tx} TX")
    m.check_unknown()
    if chirps_per_frame % code.shape[0]:
        raise fr.fail("chirps_per_frame", chirps_per_frame,
                      f"must be a multiple of the {code.shape[0]} MIMO slots ({scheme.upper()})")
    return dict(mimo_scheme=scheme, mimo_code=code)


def _read_link(ln: Section, adc: AdcFormat) -> dict[str, Any]:
    out = dict(
        tx_power_dbm=ln.number("tx_power_dbm"),
        tx_gain_dbi=ln.number("tx_gain_dbi"),
        rx_gain_dbi=ln.number("rx_gain_dbi"),
        noise_figure_db=ln.number("noise_figure_db", ge=0),
        system_loss_db=ln.number("system_loss_db", 0.0, ge=0),
        noise_rms_counts=ln.number("noise_rms_counts", gt=0),
    )
    ln.check_unknown()
    if out["noise_rms_counts"] >= adc.full_scale:
        raise ln.fail("noise_rms_counts", out["noise_rms_counts"], f"must be below the ADC full scale {adc.full_scale}")
    return out


def sensor_from_document(doc: Document) -> Sensor:
    """Validate a parsed sensor description. Raises CubecastError naming the file, the field, the
    value and the rule. `digest` is of the parsed content (not its formatting): capture and
    calibration files record it."""
    doc.check_sections(SECTIONS)
    sensor_id = _read_id(doc.section("sensor"))
    chirp_section = doc.section("chirp")
    chirp = _read_chirp(chirp_section)
    frame_section = doc.section("frame")
    frame = _read_frame(frame_section, chirp["chirp_period_s"])
    adc = _read_adc(doc.section("adc"))
    if_filter = _read_if_filter(doc.section("if_filter", required=False), chirp, adc)
    _check_design_range(chirp_section, chirp, adc, if_filter)
    antennas = _read_antennas(doc.section("antennas"), chirp)
    mimo = _read_mimo(doc.section("mimo"), frame_section, antennas["tx_positions_m"].shape[0],
                      frame["chirps_per_frame"])
    link = _read_link(doc.section("link"), adc)
    pose = _read_pose(doc.section("pose", required=False))
    # The maximum range follows from the IF band the ADC covers; a range gate beyond is rejected by the chain.
    sensor = Sensor(
        sensor_id=sensor_id, source_text=doc.text, **chirp, **frame, **antennas, **link, **mimo, adc=adc, **if_filter,
        **pose,
        digest=hashlib.sha256(json.dumps(doc.data, sort_keys=True).encode()).hexdigest()[:16],
    )
    for arr in (sensor.tx_positions_m, sensor.rx_positions_m, sensor.mimo_code, sensor.pose_position_m,
                sensor.pose_rotation):
        arr.setflags(write=False)
    return sensor


def parse_sensor(text: str, origin: str | None = None) -> Sensor:
    """Parse and validate the text of a sensor description. Raises CubecastError naming the problem."""
    return sensor_from_document(parse_toml(text, origin))


def load_sensor(path: str | Path) -> Sensor:
    return sensor_from_document(read_toml(path, "sensor description"))
