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
import logging
import math
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .calibchecks import MIN_INTEGRATED_SNR_DB, MISFIT_LIMIT_DB, NEAR_RANGE_CELLS, PHASE_ACCURACY_DEG
from .config import Document, Section, parse_toml, read_text
from .errors import CubecastError
from .sensor import Sensor

if TYPE_CHECKING:
    from .calibrate import CalibrationResult

CALIBRATION_FORMAT = "cubecast-calibration"
CALIBRATION_VERSION = 1

log = logging.getLogger(__name__)

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
        ("min_integrated_snr_db", _r(MIN_INTEGRATED_SNR_DB, 3),
         f"rule: below this the capture is refused (gain phases to {PHASE_ACCURACY_DEG:g} deg rms)"),
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
        ("refused", list(result.refusals), "written with --force despite these" if result.refusals else ""),
        ("warnings", list(result.warnings), ""),
        ("notes", [RANGE_BIAS_NOTE], ""),
    ])
    return "\n".join(lines) + "\n"


def write_calibration(path: str | Path, result: CalibrationResult, created_utc: str | None = None, *,
                      force: bool = False) -> None:
    """Write the calibration file; a refused result (result.refusals) only with `force`, else
    CubecastError naming the file and the refusals."""
    if result.refusals and not force:
        raise CubecastError(f"--out {path}: not written, the capture gives no usable calibration: "
                            + "; ".join(result.refusals) + " (--force writes it anyway)")
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
    refused: tuple[str, ...] = ()  # why `calibrate` refused it (the file was written with --force)


_NON_EMPTY = r"(?s).+"
CALIBRATION_SECTIONS = ("calibration", "target", "channel", "report")
# written for people, not read back: named here so that a misspelt field is still an error
HEADER_INFO_FIELDS = ("created_utc", "capture", "frames_used", "amplitude_reference", "phase_reference")
CHANNEL_INFO_FIELDS = ("position_m", "residual_phase_deg", "residual_amplitude_db")


def _read_header(doc: Document) -> Section:
    """[calibration]: format, version, the sensor's id and digests, the TX and RX counts."""
    doc.check_sections(CALIBRATION_SECTIONS)
    head = doc.section("calibration")
    head.check_unknown(("format", "version", "sensor_id", "sensor_digest", "array_digest", "n_tx", "n_rx",
                        "range_bias_m") + HEADER_INFO_FIELDS)
    fmt = head.raw("format")
    if fmt != CALIBRATION_FORMAT:
        raise head.fail("format", fmt, f"must be {CALIBRATION_FORMAT!r}")
    version = head.raw("version")
    if version != CALIBRATION_VERSION:
        raise head.fail("version", version, f"this cubecast reads version {CALIBRATION_VERSION}")
    for key in ("sensor_id", "sensor_digest"):
        head.string(key, pattern=_NON_EMPTY, rule="must be a non-empty string")
    head.string("array_digest", None, pattern=_NON_EMPTY, rule="must be a non-empty string")
    head.integer("n_tx", ge=1)
    head.integer("n_rx", ge=1)
    return head


def _read_gains(doc: Document, n_tx: int, n_rx: int) -> np.ndarray:
    """The [[channel]] entries: complex128 [n_tx x n_rx] gains, each channel given once at its index."""
    chans = doc.tables("channel")
    if not chans:
        raise doc.error("no [[channel]] entries")
    n_virt = n_tx * n_rx
    if len(chans) != n_virt:
        raise doc.error(f"has {len(chans)} [[channel]] entries; n_tx x n_rx = {n_tx} x {n_rx} needs {n_virt}")
    gain = np.full(n_virt, np.nan, np.complex128)
    for ch in chans:
        ch.check_unknown(("index", "tx", "rx", "gain_amplitude", "gain_phase_deg") + CHANNEL_INFO_FIELDS)
        idx = ch.integer("index", ge=0, le=n_virt - 1)
        tx = ch.integer("tx", ge=0, le=n_tx - 1)
        rx = ch.integer("rx", ge=0, le=n_rx - 1)
        if idx != tx * n_rx + rx:
            raise ch.fail("index", idx, f"channel of tx {tx}, rx {rx} must have index tx * n_rx + rx = "
                                        f"{tx * n_rx + rx}")
        if not np.isnan(gain[idx]):
            raise ch.fail("index", idx, "given twice")
        amp = ch.number("gain_amplitude", gt=0)
        ph = ch.number("gain_phase_deg")
        gain[idx] = amp * np.exp(1j * math.radians(ph))
    return gain


def _check_made_for(doc: Document, head: Section, sensor: Sensor) -> None:
    """The file must have been made for `sensor`: the same TX and RX counts, and the same array digest
    (a file without one: the same description digest)."""
    n_tx, n_rx = head.table["n_tx"], head.table["n_rx"]
    sensor_digest, array_digest = head.table["sensor_digest"], head.table.get("array_digest")
    made_for = f"made for sensor '{head.table['sensor_id']}' (digest {sensor_digest}, {n_tx} TX x {n_rx} RX)"
    this = f"sensor '{sensor.sensor_id}' (digest {sensor.digest}, {sensor.n_tx} TX x {sensor.n_rx} RX)"
    if (n_tx, n_rx) != (sensor.n_tx, sensor.n_rx):
        raise doc.error(f"{n_tx * n_rx} channels {made_for}; {this} has {sensor.n_virtual} virtual channels")
    if array_digest is not None and array_digest != sensor.array_digest:
        raise head.fail("array_digest", array_digest, f"{made_for}, whose chirp, antenna positions, MIMO code or "
                                                      f"ADC format differ from {this} (array digest "
                                                      f"{sensor.array_digest}); calibrate again with a capture "
                                                      f"of this sensor")
    if array_digest is None and sensor_digest != sensor.digest:
        raise head.fail("sensor_digest", sensor_digest, f"{made_for}, not for {this}; calibrate again with a "
                                                        f"capture of this sensor")


def load_calibration_file(path: str | Path, sensor: Sensor | None = None) -> CalibrationFile:
    """Read and validate a calibration file; with `sensor`, also check it was made for that sensor
    (digest, TX/RX counts, channel count). Raises CubecastError naming the problem (config.py's
    format, the file named "calibration PATH"), an unknown section or an unknown field of [calibration] or
    [[channel]] among them; [target] and [report] are the calibration's account for people and not checked."""
    path = Path(path)
    doc = parse_toml(read_text(path, "calibration"), f"calibration {path}")
    head = _read_header(doc)
    n_tx, n_rx = head.table["n_tx"], head.table["n_rx"]
    bias = head.number("range_bias_m")
    gain = _read_gains(doc, n_tx, n_rx)
    if sensor is not None:
        _check_made_for(doc, head, sensor)
    report = doc.data.get("report", {}) if isinstance(doc.data.get("report"), dict) else {}
    warns = report.get("warnings", [])
    refused = report.get("refused", [])
    frames_used = head.table.get("frames_used", 0)
    target = doc.data.get("target")
    return CalibrationFile(
        path=str(path), vector=(1.0 / gain).astype(np.complex64), gain=gain, range_bias_m=bias,
        sensor_id=head.table["sensor_id"], sensor_digest=head.table["sensor_digest"],
        array_digest=head.table.get("array_digest"), n_tx=n_tx, n_rx=n_rx,
        created_utc=str(head.table.get("created_utc", "")),
        frames_used=int(frames_used) if isinstance(frames_used, int) else 0,
        target=dict(target) if isinstance(target, dict) else {},
        warnings=tuple(str(w) for w in warns) if isinstance(warns, list) else (),
        refused=tuple(str(w) for w in refused) if isinstance(refused, list) else ())


def load_calibration(path: str | Path, sensor: Sensor) -> np.ndarray:
    """The calibration vector (complex64 [n_virtual], multiplied onto each virtual channel) of a
    calibration file made for `sensor`. Raises CubecastError on a file for another sensor. A file written
    with --force despite a refusal is used, with a warning saying so."""
    f = load_calibration_file(path, sensor)
    if f.refused:
        log.warning("cubecast: warning: calibration %s was written with --force although %s", path,
                    "; ".join(f.refused))
    return f.vector
