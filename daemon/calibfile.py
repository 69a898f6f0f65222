"""The calibration file: TOML in cubecast's own layout (README "Calibration file").

format_calibration / write_calibration write what estimate_calibration (calibrate.py) measured: the
[calibration] header (format, version, the sensor's id and digests, the range bias), the [target],
one [[channel]] per virtual channel v = tx * n_rx + rx with its measured gain, and a [report] of the
checks. load_calibration_file reads it back and validates it, and with a sensor checks that it was
made for that sensor (array digest; files written before the array digest existed: the whole
description's digest); load_calibration gives the complex64 vector (1 / gain) the Pipeline takes.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .calibchecks import MIN_INTEGRATED_SNR_DB, MISFIT_LIMIT_DB, NEAR_RANGE_CELLS
from .errors import CubecastError
from .sensor import Sensor

if TYPE_CHECKING:
    from .calibrate import CalibrationResult

CALIBRATION_FORMAT = "cubecast-calibration"
CALIBRATION_VERSION = 1

RANGE_BIAS_NOTE = ("with --calibration, process and serve multiply each channel by 1 / gain and subtract "
                   "range_bias_m from every range")


# ---- writing ----------------------------------------------------------------------------------

def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        v = float(v)
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=True)
    if isinstance(v, (list, tuple, np.ndarray)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def _table(lines: list[str], rows: list[tuple[str, object, str]]) -> None:
    for key, value, comment in rows:
        lines.append(f"{key} = {_toml_value(value)}" + (f"  # {comment}" if comment else ""))


def _r(x: float, digits: int = 6) -> float:
    return float(round(float(x), digits)) if math.isfinite(float(x)) else float(x)


def format_calibration(result: CalibrationResult, created_utc: str | None = None) -> str:
    """The calibration file's text (TOML, our own layout; README "Calibration file")."""
    s = result.sensor
    created = created_utc or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    lines = [
        f"# cubecast calibration of sensor '{s.sensor_id}': measured gain of each virtual channel.",
        "# The chain multiplies channel v = tx * n_rx + rx by 1 / gain before angle estimation.",
        "",
        "[calibration]",
    ]
    _table(lines, [
        ("format", CALIBRATION_FORMAT, ""),
        ("version", CALIBRATION_VERSION, ""),
        ("sensor_id", s.sensor_id, ""),
        ("sensor_digest", s.digest, "the sensor description it was made with"),
        ("array_digest", s.array_digest, "valid for sensors with this chirp, array, MIMO code and ADC format"),
        ("n_tx", s.n_tx, ""),
        ("n_rx", s.n_rx, ""),
        ("created_utc", created, ""),
        ("capture", result.capture, ""),
        ("frames_used", result.frames_used, ""),
        ("range_bias_m", _r(result.range_bias_m, 6), "measured minus true range; subtract from ranges"),
        ("amplitude_reference", "mean amplitude over channels", ""),
        ("phase_reference", "channel 0", ""),
    ])
    lines += ["", "[target]"]
    _table(lines, [
        ("range_m", result.target_range_m, "given"),
        ("azimuth_deg", result.azimuth_deg, "given"),
        ("elevation_deg", result.elevation_deg, "given"),
        ("position_m", [_r(x, 9) for x in result.target_position_m], "x right, y boresight, z up"),
        ("measured_range_m", _r(result.measured_range_m, 6), ""),
        ("range_bin", result.range_bin, ""),
    ])
    pos = s.virtual_positions_m
    for v in range(s.n_virtual):
        g = result.gain[v]
        lines += ["", "[[channel]]"]
        _table(lines, [
            ("index", v, ""),
            ("tx", v // s.n_rx, ""),
            ("rx", v % s.n_rx, ""),
            ("position_m", [_r(x, 9) for x in pos[v]], ""),
            ("gain_amplitude", _r(abs(g), 8), f"{20.0 * math.log10(abs(g)):+.3f} dB"),
            ("gain_phase_deg", _r(math.degrees(np.angle(g)), 6), ""),
            ("residual_phase_deg", _r(result.residual_phase_deg[v], 4), "rms over frames"),
            ("residual_amplitude_db", _r(result.residual_amplitude_db[v], 4), "rms over frames"),
        ])
    lines += ["", "[report]"]
    _table(lines, [
        ("cell_snr_db", _r(result.cell_snr_db, 2), "per channel and frame, in the reflector's cell"),
        ("integrated_snr_db", _r(result.integrated_snr_db, 2), "over the frames used"),
        ("min_integrated_snr_db", MIN_INTEGRATED_SNR_DB, "rule: below this the reflector is too weak"),
        ("predicted_phase_error_deg", _r(result.predicted_phase_deg, 4), "1 / sqrt(2 x integrated SNR)"),
        ("residual_phase_rms_deg", _r(float(np.sqrt(np.mean(result.residual_phase_deg ** 2))), 4),
         "frame-to-frame, all channels"),
        ("residual_phase_expected_deg", _r(result.frame_phase_deg, 4), "1 / sqrt(2 x cell SNR): noise alone"),
        ("residual_amplitude_rms_db", _r(float(np.sqrt(np.mean(result.residual_amplitude_db ** 2))), 4), ""),
        ("range_rms_m", _r(result.range_rms_m, 6), "frame-to-frame scatter of the measured range"),
        ("neighbour_misfit_db", _r(result.neighbour_misfit_db, 2),
         f"calibrated cells beside the reflector vs one point; rule: above {MISFIT_LIMIT_DB:g} dB warns"),
        ("neighbour_misfit_noise_db", _r(result.expected_misfit_db, 2), "what noise alone gives"),
        ("azimuth_uncalibrated_deg", _r(result.azimuth_uncalibrated_deg, 4), "the chain's estimate"),
        ("azimuth_calibrated_deg", _r(result.azimuth_calibrated_deg, 4), ""),
        ("elevation_uncalibrated_deg", _r(result.elevation_uncalibrated_deg, 4), ""),
        ("elevation_calibrated_deg", _r(result.elevation_calibrated_deg, 4), ""),
        ("peak_sidelobe_uncalibrated_db", _r(result.psl_uncalibrated_db, 2), "azimuth beam, rect weights"),
        ("peak_sidelobe_calibrated_db", _r(result.psl_calibrated_db, 2), ""),
        ("far_field_m", _r(result.far_field_m, 4), "2 D^2 / lambda, D the virtual aperture"),
        ("near_limit_m", _r(result.near_limit_m, 4),
         f"rule: max(far field, {NEAR_RANGE_CELLS} range cells); a nearer reflector warns"),
        ("clipped_samples", result.clipped_samples, ""),
        ("warnings", list(result.warnings), ""),
        ("notes", [RANGE_BIAS_NOTE], ""),
    ])
    return "\n".join(lines) + "\n"


def write_calibration(path: str | Path, result: CalibrationResult, created_utc: str | None = None) -> None:
    text = format_calibration(result, created_utc)
    try:
        Path(path).write_text(text, encoding="utf-8")
    except OSError as exc:
        raise CubecastError(f"--out {path}: cannot write: {exc.strerror or exc}") from None


# ---- reading ----------------------------------------------------------------------------------

@dataclass(frozen=True)
class CalibrationFile:
    """A calibration file read back (load_calibration_file)."""

    path: str
    vector: np.ndarray  # complex64 [n_virtual]: multiply onto the channels (1 / gain)
    gain: np.ndarray  # complex128 [n_virtual]
    range_bias_m: float
    sensor_id: str
    sensor_digest: str
    array_digest: str | None  # None in files written before the array digest existed
    n_tx: int
    n_rx: int
    created_utc: str
    frames_used: int
    target: dict
    warnings: tuple[str, ...]


def _finite(where: str, key: str, value, positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise CubecastError(f"{where} {key} = {value!r}: must be a finite number")
    if positive and value <= 0:
        raise CubecastError(f"{where} {key} = {value!r}: must be greater than zero")
    return float(value)


def load_calibration_file(path: str | Path, sensor: Sensor | None = None) -> CalibrationFile:
    """Read and validate a calibration file; with `sensor`, also check it was made for that sensor
    (digest, TX/RX counts, channel count). Raises CubecastError naming the problem."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise CubecastError(f"cannot read calibration {path}: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise CubecastError(f"calibration {path}: not UTF-8 text") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CubecastError(f"calibration {path}: not valid TOML: {exc}") from None
    pre = f"calibration {path}:"
    head = doc.get("calibration")
    if not isinstance(head, dict):
        raise CubecastError(f"{pre} missing section [calibration]")
    if head.get("format") != CALIBRATION_FORMAT:
        raise CubecastError(f"{pre} [calibration] format = {head.get('format')!r}: must be {CALIBRATION_FORMAT!r}")
    if head.get("version") != CALIBRATION_VERSION:
        raise CubecastError(f"{pre} [calibration] version = {head.get('version')!r}: this cubecast reads "
                            f"version {CALIBRATION_VERSION}")
    for key in ("sensor_id", "sensor_digest") + (("array_digest",) if "array_digest" in head else ()):
        if not isinstance(head.get(key), str) or not head.get(key):
            raise CubecastError(f"{pre} [calibration] {key} = {head.get(key)!r}: must be a non-empty string")
    array_digest = head.get("array_digest")
    n_tx, n_rx = head.get("n_tx"), head.get("n_rx")
    for key, value in (("n_tx", n_tx), ("n_rx", n_rx)):
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise CubecastError(f"{pre} [calibration] {key} = {value!r}: must be a whole number of at least 1")
    bias = _finite(f"{pre} [calibration]", "range_bias_m", head.get("range_bias_m"))
    chans = doc.get("channel")
    if not isinstance(chans, list) or not chans:
        raise CubecastError(f"{pre} no [[channel]] entries")
    n_virt = n_tx * n_rx
    if len(chans) != n_virt:
        raise CubecastError(f"{pre} has {len(chans)} [[channel]] entries; n_tx x n_rx = {n_tx} x {n_rx} "
                            f"needs {n_virt}")
    gain = np.full(n_virt, np.nan, np.complex128)
    for i, ch in enumerate(chans):
        where = f"{pre} [[channel]] #{i}"
        if not isinstance(ch, dict):
            raise CubecastError(f"{where}: must be a table")
        idx, tx, rx = ch.get("index"), ch.get("tx"), ch.get("rx")
        for key, value, top in (("index", idx, n_virt), ("tx", tx, n_tx), ("rx", rx, n_rx)):
            if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value < top:
                raise CubecastError(f"{where} {key} = {value!r}: must be a whole number in 0..{top - 1}")
        if idx != tx * n_rx + rx:
            raise CubecastError(f"{where} index = {idx}: channel of tx {tx}, rx {rx} must have index "
                                f"tx * n_rx + rx = {tx * n_rx + rx}")
        if not np.isnan(gain[idx]):
            raise CubecastError(f"{where} index = {idx}: given twice")
        amp = _finite(where, "gain_amplitude", ch.get("gain_amplitude"), positive=True)
        ph = _finite(where, "gain_phase_deg", ch.get("gain_phase_deg"))
        gain[idx] = amp * np.exp(1j * math.radians(ph))
    if sensor is not None:
        made_for = f"made for sensor '{head['sensor_id']}' (digest {head['sensor_digest']}, {n_tx} TX x {n_rx} RX)"
        this = f"sensor '{sensor.sensor_id}' (digest {sensor.digest}, {sensor.n_tx} TX x {sensor.n_rx} RX)"
        if (n_tx, n_rx) != (sensor.n_tx, sensor.n_rx):
            raise CubecastError(f"{pre} {n_virt} channels {made_for}; {this} has {sensor.n_virtual} virtual "
                                f"channels")
        if array_digest is not None and array_digest != sensor.array_digest:
            raise CubecastError(f"{pre} [calibration] array_digest = {array_digest!r}: {made_for}, whose chirp, "
                                f"antenna positions, MIMO code or ADC format differ from {this} (array digest "
                                f"{sensor.array_digest}); calibrate again with a capture of this sensor")
        if array_digest is None and head["sensor_digest"] != sensor.digest:
            raise CubecastError(f"{pre} [calibration] sensor_digest = {head['sensor_digest']!r}: {made_for}, "
                                f"not for {this}; calibrate again with a capture of this sensor")
    report = doc.get("report", {}) if isinstance(doc.get("report"), dict) else {}
    warns = report.get("warnings", [])
    frames_used = head.get("frames_used", 0)
    return CalibrationFile(
        path=str(path), vector=(1.0 / gain).astype(np.complex64), gain=gain, range_bias_m=bias,
        sensor_id=head["sensor_id"], sensor_digest=head["sensor_digest"], array_digest=array_digest, n_tx=n_tx,
        n_rx=n_rx,
        created_utc=str(head.get("created_utc", "")),
        frames_used=int(frames_used) if isinstance(frames_used, int) else 0,
        target=dict(doc.get("target", {})) if isinstance(doc.get("target"), dict) else {},
        warnings=tuple(str(w) for w in warns) if isinstance(warns, list) else ())


def load_calibration(path: str | Path, sensor: Sensor) -> np.ndarray:
    """The calibration vector (complex64 [n_virtual], multiplied onto each virtual channel) of a
    calibration file made for `sensor`. Raises CubecastError on a file for another sensor."""
    return load_calibration_file(path, sensor).vector
