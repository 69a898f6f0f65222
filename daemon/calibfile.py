"""The calibration file: TOML in cubecast's own layout (README "Calibration file").

format_calibration / write_calibration write what estimate_calibration (calibrate.py) measured: the
[calibration] header (format, version, the sensor's id and digests, the range bias), the [target],
one [[channel]] per virtual channel v = tx * n_rx + rx with its measured gain, and a [report] of the
checks. load_calibration_file reads it back and validates it, and with a sensor checks that it was
made for that sensor (array digest; files written before the array digest existed: the whole
description's digest); load_calibration gives the complex64 vector (1 / gain) the Pipeline takes.

The I/Q imbalance of each receive channel (calibiq.py) is the table [[iq_imbalance]], one entry per RX
with `rx`, `q_gain` (g, linear, > 0) and `q_phase_deg` (phi, within -90..90 deg exclusive), plus figures
for people (its standard deviations, image rejection, samples, DC). A file without the table (older
files, a real-sampled ADC, a refused estimate) means no I/Q correction. A file of `calibrate --iq-only`
has the table and no [[channel]] entries (no array calibration, range bias 0). load_chain_calibration
gives all three things the Pipeline takes.
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
from .calibiq import IQ_METHOD, IqResult, check_iq_table
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
IQ_NOTE = ("with --calibration, process and serve correct each receive channel's I/Q imbalance first: "
           "I = I', Q = (Q' / q_gain + I' sin q_phase) / cos q_phase")


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
    lines += iq_table_lines(result.iq)
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
        ("notes", [RANGE_BIAS_NOTE] + ([IQ_NOTE] if result.iq is not None and result.iq.table is not None else []),
         ""),
    ])
    lines += iq_report_rows(result.iq)
    return "\n".join(lines) + "\n"


def iq_table_lines(iq: IqResult | None) -> list[str]:
    """The [[iq_imbalance]] entries (none when there is no estimate or it was refused)."""
    lines: list[str] = []
    if iq is None or iq.table is None:
        return lines
    for rx in range(len(iq.gain)):
        sd_db = 20.0 / math.log(10.0) * iq.gain_sd[rx] / iq.gain[rx]
        lines += ["", "[[iq_imbalance]]"]
        _table(lines, [
            ("rx", rx, ""),
            ("q_gain", _r(iq.gain[rx], 9), f"{iq.gain_db[rx]:+.4f} dB: Q branch amplitude over I"),
            ("q_phase_deg", _r(math.degrees(iq.phase_rad[rx]), 6), "Q' = q_gain (Q cos phi - I sin phi)"),
            ("q_gain_sd", _r(iq.gain_sd[rx], 9), f"{sd_db:.4f} dB; g cos phi / sqrt(samples)"),
            ("q_phase_sd_deg", _r(math.degrees(iq.phase_sd_rad[rx]), 6), "cos phi / sqrt(samples)"),
            ("image_rejection_db", _r(iq.image_rejection_db[rx], 3), "of this imbalance, uncorrected"),
            ("dc_offset_counts", _r(iq.dc_offset_counts[rx], 4), "|mean| per frame, removed before the estimate"),
        ])
    return lines


def iq_report_rows(iq: IqResult | None) -> list[str]:
    """The I/Q part of [report] (continues the table)."""
    lines: list[str] = []
    if iq is None:
        return lines
    _table(lines, [
        ("iq_method", IQ_METHOD, ""),
        ("iq_samples", iq.samples, "per receive channel: frames x slots x samples x (loops - 1)"),
        ("iq_corrected_image_rejection_db", _r(iq.corrected_irr_db, 2),
         "expected after correction: 10 log10(2 x samples)"),
        ("iq_clipped_samples", [int(c) for c in iq.clipped], "per receive channel"),
        ("iq_refused", list(iq.refusals), "so no I/Q table written" if iq.refusals else ""),
        ("iq_warnings", list(iq.warnings), ""),
    ])
    return lines


def format_iq_calibration(sensor: Sensor, iq: IqResult, capture: str = "", created_utc: str | None = None) -> str:
    """The text of an I/Q-only calibration file (`calibrate --iq-only`): [calibration], [[iq_imbalance]],
    [report]; no [[channel]] (no array calibration) and range bias 0."""
    created = created_utc or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    lines = [
        f"# cubecast calibration of sensor '{sensor.sensor_id}': I/Q imbalance of each receive channel only.",
        "# The chain corrects it before the range FFT; no array gains, no range bias.",
        "",
        "[calibration]",
    ]
    _table(lines, [
        ("format", CALIBRATION_FORMAT, ""),
        ("version", CALIBRATION_VERSION, ""),
        ("sensor_id", sensor.sensor_id, ""),
        ("sensor_digest", sensor.digest, "the sensor description it was made with"),
        ("array_digest", sensor.array_digest, "valid for sensors with this chirp, array, MIMO code and ADC format"),
        ("n_tx", sensor.n_tx, ""),
        ("n_rx", sensor.n_rx, ""),
        ("created_utc", created, ""),
        ("capture", capture, ""),
        ("frames_used", iq.frames, ""),
        ("range_bias_m", 0.0, "not measured (--iq-only)"),
    ])
    lines += iq_table_lines(iq)
    lines += ["", "[report]"]
    lines += iq_report_rows(iq)
    _table(lines, [("notes", [IQ_NOTE], "")])
    return "\n".join(lines) + "\n"


def write_iq_calibration(path: str | Path, sensor: Sensor, iq: IqResult, capture: str = "",
                         created_utc: str | None = None) -> None:
    """Write an I/Q-only calibration file; a refused estimate is never written (CubecastError)."""
    if iq.refusals:
        raise CubecastError(f"--out {path}: not written, the capture gives no I/Q imbalance estimate: "
                            + "; ".join(iq.refusals))
    _write_text(path, format_iq_calibration(sensor, iq, capture, created_utc))


def _write_text(path: str | Path, text: str) -> None:
    try:
        Path(path).write_text(text, encoding="utf-8")
    except OSError as exc:
        raise CubecastError(f"--out {path}: cannot write: {exc.strerror or exc}") from None


def write_calibration(path: str | Path, result: CalibrationResult, created_utc: str | None = None, *,
                      force: bool = False) -> None:
    """Write the calibration file; a refused result (result.refusals) only with `force`, else
    CubecastError naming the file and the refusals."""
    if result.refusals and not force:
        raise CubecastError(f"--out {path}: not written, the capture gives no usable calibration: "
                            + "; ".join(result.refusals) + " (--force writes it anyway)")
    _write_text(path, format_calibration(result, created_utc))


# ---- reading ----------------------------------------------------------------------------------

@dataclass(frozen=True)
class CalibrationFile:
    """A calibration file read back (load_calibration_file)."""

    path: str
    vector: np.ndarray | None  # complex64 [n_virtual]: multiply onto the channels (1 / gain); None: --iq-only
    gain: np.ndarray | None  # complex128 [n_virtual]
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
    iq_imbalance: np.ndarray | None = None  # float64 [n_rx, 2] = (g, phi rad) per RX; None: no I/Q correction


_NON_EMPTY = r"(?s).+"
CALIBRATION_SECTIONS = ("calibration", "target", "channel", "iq_imbalance", "report")
# written for people, not read back: named here so that a misspelt field is still an error
HEADER_INFO_FIELDS = ("created_utc", "capture", "frames_used", "amplitude_reference", "phase_reference")
CHANNEL_INFO_FIELDS = ("position_m", "residual_phase_deg", "residual_amplitude_db")
IQ_INFO_FIELDS = ("q_gain_sd", "q_phase_sd_deg", "image_rejection_db", "dc_offset_counts")


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


def _read_iq(doc: Document, n_rx: int) -> np.ndarray | None:
    """The [[iq_imbalance]] entries: float64 [n_rx, 2] = (q_gain, q_phase in rad), each RX given once;
    None without entries (no I/Q correction)."""
    entries = doc.tables("iq_imbalance")
    if not entries:
        return None
    if len(entries) != n_rx:
        raise doc.error(f"has {len(entries)} [[iq_imbalance]] entries; n_rx = {n_rx} needs one per receive channel")
    table = np.full((n_rx, 2), np.nan)
    for e in entries:
        e.check_unknown(("rx", "q_gain", "q_phase_deg") + IQ_INFO_FIELDS)
        rx = e.integer("rx", ge=0, le=n_rx - 1)
        if not np.isnan(table[rx, 0]):
            raise e.fail("rx", rx, "given twice")
        table[rx, 0] = e.number("q_gain", gt=0)
        table[rx, 1] = math.radians(e.number("q_phase_deg", gt=-90.0, lt=90.0))
    return check_iq_table(table, n_rx, f"{doc.origin} [[iq_imbalance]]")


def _read_gains(doc: Document, n_tx: int, n_rx: int) -> np.ndarray:
    """The [[channel]] entries: complex128 [n_tx x n_rx] gains, each channel given once at its index."""
    chans = doc.tables("channel")
    if not chans:
        raise doc.error("no [[channel]] entries (and no [[iq_imbalance]] entries: a file of calibrate --iq-only "
                        "has those instead)")
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
    iq = _read_iq(doc, n_rx)
    gain = None if iq is not None and not doc.tables("channel") else _read_gains(doc, n_tx, n_rx)
    if gain is None and bias != 0.0:
        raise head.fail("range_bias_m", bias, "a file without [[channel]] entries (calibrate --iq-only) measured "
                                              "no range bias: must be 0")
    if sensor is not None:
        _check_made_for(doc, head, sensor)
    report = doc.data.get("report", {}) if isinstance(doc.data.get("report"), dict) else {}
    warns = report.get("warnings", [])
    refused = report.get("refused", [])
    frames_used = head.table.get("frames_used", 0)
    target = doc.data.get("target")
    return CalibrationFile(
        path=str(path), vector=None if gain is None else (1.0 / gain).astype(np.complex64), gain=gain,
        range_bias_m=bias, iq_imbalance=iq,
        sensor_id=head.table["sensor_id"], sensor_digest=head.table["sensor_digest"],
        array_digest=head.table.get("array_digest"), n_tx=n_tx, n_rx=n_rx,
        created_utc=str(head.table.get("created_utc", "")),
        frames_used=int(frames_used) if isinstance(frames_used, int) else 0,
        target=dict(target) if isinstance(target, dict) else {},
        warnings=_report_texts(warns) + tuple(f"I/Q: {w}" for w in _report_texts(report.get("iq_warnings", []))),
        refused=tuple(str(w) for w in refused) if isinstance(refused, list) else ())


def _report_texts(value) -> tuple[str, ...]:
    return tuple(str(w) for w in value) if isinstance(value, list) else ()


@dataclass(frozen=True)
class ChainCalibration:
    """What a Pipeline takes from a calibration file: Pipeline(sensor, settings, vector, range_bias_m,
    iq_imbalance)."""

    vector: np.ndarray | None = None
    range_bias_m: float = 0.0
    iq_imbalance: np.ndarray | None = None


def load_chain_calibration(path: str | Path | None, sensor: Sensor) -> ChainCalibration:
    """The calibration vector, range bias and I/Q table of a calibration file made for `sensor` (all
    empty without a file). A file written with --force despite a refusal is used, with a warning."""
    if path is None:
        return ChainCalibration()
    f = load_calibration_file(path, sensor)
    if f.refused:
        log.warning("cubecast: warning: calibration %s was written with --force although %s", path,
                    "; ".join(f.refused))
    return ChainCalibration(f.vector, f.range_bias_m, f.iq_imbalance)


def load_calibration(path: str | Path, sensor: Sensor) -> np.ndarray:
    """The calibration vector (complex64 [n_virtual], multiplied onto each virtual channel) of a
    calibration file made for `sensor`. Raises CubecastError on a file for another sensor. A file written
    with --force despite a refusal is used, with a warning saying so."""
    f = load_calibration_file(path, sensor)
    if f.refused:
        log.warning("cubecast: warning: calibration %s was written with --force although %s", path,
                    "; ".join(f.refused))
    return f.vector
