"""The front end's monitor in words: one frame's per-channel records (chain/frontend.FRONTEND_DTYPE,
the wire's FRONTEND_WIRE_FIELDS) turned into warnings that name the receive channel and the cause, and
the summary of many frames (serve's health interval, a whole `cubecast process` run). Pure: numbers in,
plain data out; serve, process and the viewer show them.

Receive channels are named `rx N`, N counted from 0 in the order of the sensor file's
`[antennas] rx_positions...` (the ADC frame's rx axis), as the calibration names them.

A warning is raised when, in one frame (README "Front-end monitor" gives the same table):

  clipping          clipped_samples / samples >= CLIPPED_WARN_FRACTION
  interference      interference_samples / samples >= INTERFERENCE_WARN_SHARE
  dc_offset         dc_offset_counts >= DC_WARN_FULL_SCALE_FRACTION x full scale, or the DC power
                    |mean|^2 at least DC_WARN_OVER_NOISE_DB over the noise power per sample
  image_rejection   image_rejection_db < IMAGE_REJECTION_WARN_DB
  noise_floor_high  noise_floor_db >= NOISE_FLOOR_WARN_DB over the median of all channels' floors
  noise_floor_low   noise_floor_db <= NOISE_FLOOR_WARN_DB under that median (needs 3 or more channels
                    with a floor, so that the median is not the channel itself or a pair's middle)
  no_signal         samples were looked at but the channel has no noise at all (floor nil: -inf)

A figure that is not finite (nil on the wire: not measured) raises nothing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .wire import FRONTEND_CAUSES, FRONTEND_SUMMARY_COUNTS, FRONTEND_SUMMARY_FIELDS

CLIPPED_WARN_FRACTION = 1e-3          # 0.1 % of the samples with I or Q at full scale
INTERFERENCE_WARN_SHARE = 1e-3        # 0.1 % of the samples flagged as interference
DC_WARN_FULL_SCALE_FRACTION = 0.02    # a DC offset of 2 % of full scale takes that much headroom
DC_WARN_OVER_NOISE_DB = 20.0          # |mean| 10 x the noise rms per complex sample
IMAGE_REJECTION_WARN_DB = 25.0        # below this, mirror targets stand out of the noise
NOISE_FLOOR_WARN_DB = 6.0             # a channel's floor this far from the channels' median
NOISE_FLOOR_MIN_CHANNELS = 3          # channels with a floor needed to compare them

THRESHOLDS = {
    "clipping": CLIPPED_WARN_FRACTION, "interference": INTERFERENCE_WARN_SHARE,
    "dc_offset": (DC_WARN_FULL_SCALE_FRACTION, DC_WARN_OVER_NOISE_DB), "image_rejection": IMAGE_REJECTION_WARN_DB,
    "noise_floor_high": NOISE_FLOOR_WARN_DB, "noise_floor_low": NOISE_FLOOR_WARN_DB, "no_signal": 0.0,
}
assert tuple(THRESHOLDS) == FRONTEND_CAUSES
VALUE_UNITS = {"clipping": "%", "interference": "%", "dc_offset": "counts", "image_rejection": "dB",
               "noise_floor_high": "dB", "noise_floor_low": "dB", "no_signal": ""}


@dataclass(frozen=True)
class FrontendWarning:
    """One channel's problem in one frame. value: the figure in VALUE_UNITS[cause] (percent of samples,
    counts, dB of image rejection, dB from the channels' median floor); short: a few words for a status
    line; text: a sentence with the likely reason."""

    rx: int
    cause: str
    value: float
    short: str
    text: str

    def as_map(self) -> dict:
        """The wire's warning map (README "Wire format", kind `frontend`)."""
        return {"rx": self.rx, "cause": self.cause, "value": float(self.value), "short": self.short,
                "text": self.text}


def percent(value: float) -> str:
    """A percentage with two significant figures at most, plainly: 13, 1.3, 0.13, 0.013."""
    if value >= 10:
        return f"{value:.0f}"
    if value >= 1:
        return f"{value:.1f}"
    return f"{value:.2g}"


def _fraction(part: float, whole: float) -> float:
    return part / whole if whole > 0 else 0.0


def _floor_median(floors: np.ndarray) -> float | None:
    finite = floors[np.isfinite(floors)]
    return float(np.median(finite)) if finite.size >= NOISE_FLOOR_MIN_CHANNELS else None


def channel_warnings(rx: int, rec, full_scale: float, floor_median: float | None) -> list[FrontendWarning]:
    """The warnings of one channel's record (`rec` a record, or a map, of the FRONTEND fields)."""
    out: list[FrontendWarning] = []
    name = f"rx {rx}"
    samples = float(rec["samples"])
    clipped = _fraction(float(rec["clipped_samples"]), samples)
    if clipped >= CLIPPED_WARN_FRACTION:
        p = percent(100 * clipped)
        out.append(FrontendWarning(rx, "clipping", 100 * clipped, f"{name} clipping {p} %",
                                   f"{name}: {p} % of samples clipped (a strong near reflector, or too much "
                                   "receiver gain)"))
    share = _fraction(float(rec["interference_samples"]), samples)
    if share >= INTERFERENCE_WARN_SHARE:
        p, bursts = percent(100 * share), int(rec["interference_bursts"])
        out.append(FrontendWarning(rx, "interference", 100 * share, f"{name} interference {p} %",
                                   f"{name}: interference from another radar: {bursts} burst"
                                   f"{'s' if bursts != 1 else ''}, {p} % of samples"))
    floor = float(rec["noise_floor_db"])
    dc = float(rec["dc_offset_counts"])
    if math.isfinite(dc) and dc > 0:
        of_scale = dc / full_scale
        over_noise = 20 * math.log10(dc) - floor if math.isfinite(floor) else math.nan
        if of_scale >= DC_WARN_FULL_SCALE_FRACTION or over_noise >= DC_WARN_OVER_NOISE_DB:
            p = percent(100 * of_scale)
            noise = f", {over_noise:.0f} dB over the noise" if math.isfinite(over_noise) else ""
            out.append(FrontendWarning(rx, "dc_offset", dc, f"{name} DC {p} % FS",
                                       f"{name}: DC offset of {dc:.0f} counts ({p} % of full scale{noise}): "
                                       "check the ADC's offset or the mixer's balance"))
    irr = float(rec["image_rejection_db"])
    if math.isfinite(irr) and irr < IMAGE_REJECTION_WARN_DB:
        out.append(FrontendWarning(rx, "image_rejection", irr, f"{name} IRR {irr:.0f} dB",
                                   f"{name}: image rejection {irr:.1f} dB (I/Q gain or phase imbalance: mirror "
                                   "targets at the negative beat frequency; calibrate the I/Q correction)"))
    if samples > 0 and floor == -math.inf:
        out.append(FrontendWarning(rx, "no_signal", 0.0, f"{name} no signal",
                                   f"{name}: no noise at all, every sample the same (a dead or disconnected "
                                   "channel)"))
    elif floor_median is not None and math.isfinite(floor):
        d = floor - floor_median
        if d >= NOISE_FLOOR_WARN_DB:
            out.append(FrontendWarning(rx, "noise_floor_high", d, f"{name} floor +{d:.0f} dB",
                                       f"{name}: noise floor {d:.1f} dB above the channels' median (a noisy "
                                       "channel: oscillation, a loose connector or interference on it)"))
        elif d <= -NOISE_FLOOR_WARN_DB:
            out.append(FrontendWarning(rx, "noise_floor_low", d, f"{name} floor {d:.0f} dB",
                                       f"{name}: noise floor {-d:.1f} dB below the channels' median (a dead, "
                                       "disconnected or unpowered channel)"))
    return out


def frontend_warnings(records: np.ndarray, full_scale: float) -> list[FrontendWarning]:
    """Every warning of one frame, channel by channel (records: [n_rx] with the FRONTEND fields;
    full_scale: the ADC's, in counts, as the sensor's [adc] full_scale)."""
    median = _floor_median(np.asarray(records["noise_floor_db"], np.float64))
    out: list[FrontendWarning] = []
    names = records.dtype.names
    for rx, values in enumerate(records.tolist()):  # plain Python numbers: cheaper than numpy scalars here
        out.extend(channel_warnings(rx, dict(zip(names, values)), full_scale, median))
    return out


class FrontendSummary:
    """Per-channel figures over many frames: worst and mean clipped share, interference bursts and
    share, noise floor, DC and image rejection, and the frames with warnings by cause. `add` per frame;
    `health()` the map of health's `frontend` (None before any frame); `reset()` starts afresh."""

    def __init__(self, n_rx: int):
        self.n_rx = n_rx
        self.reset()

    def reset(self) -> None:
        n = self.n_rx
        self.frames = self.frames_with_warnings = 0
        self.by_cause = dict.fromkeys(FRONTEND_CAUSES, 0)
        self._clip_max, self._clip_sum = np.zeros(n), np.zeros(n)
        self._share_max, self._share_sum = np.zeros(n), np.zeros(n)
        self._bursts_max, self._bursts_total = np.zeros(n, np.int64), np.zeros(n, np.int64)
        self._floor_sum, self._floor_n = np.zeros(n), np.zeros(n, np.int64)
        self._floor_max = np.full(n, -np.inf)
        self._dc_max = np.full(n, -np.inf)
        self._irr_min = np.full(n, np.inf)

    def add(self, records: np.ndarray, warnings: list[FrontendWarning]) -> None:
        samples = np.maximum(records["samples"].astype(np.float64), 1.0)
        clip = 100 * records["clipped_samples"] / samples
        share = 100 * records["interference_samples"] / samples
        bursts = records["interference_bursts"].astype(np.int64)
        self.frames += 1
        self._clip_max = np.maximum(self._clip_max, clip)
        self._clip_sum += clip
        self._share_max = np.maximum(self._share_max, share)
        self._share_sum += share
        self._bursts_max = np.maximum(self._bursts_max, bursts)
        self._bursts_total += bursts
        floor = records["noise_floor_db"].astype(np.float64)
        ok = np.isfinite(floor)
        self._floor_sum[ok] += floor[ok]
        self._floor_n += ok
        self._floor_max[ok] = np.maximum(self._floor_max[ok], floor[ok])
        dc = records["dc_offset_counts"].astype(np.float64)
        ok = np.isfinite(dc)
        self._dc_max[ok] = np.maximum(self._dc_max[ok], dc[ok])
        irr = records["image_rejection_db"].astype(np.float64)
        ok = np.isfinite(irr)
        self._irr_min[ok] = np.minimum(self._irr_min[ok], irr[ok])
        if warnings:
            self.frames_with_warnings += 1
            for cause in {w.cause for w in warnings}:
                self.by_cause[cause] += 1

    def channels(self) -> dict:
        """FRONTEND_SUMMARY_FIELDS -> a list per field, one entry per channel (nil where nothing finite
        was measured)."""
        n = max(self.frames, 1)

        def finite(values: np.ndarray) -> list:
            return [float(v) if math.isfinite(v) else None for v in values]

        with np.errstate(invalid="ignore", divide="ignore"):
            floor_mean = np.where(self._floor_n > 0, self._floor_sum / np.maximum(self._floor_n, 1), np.nan)
        out = {
            "clipped_percent_max": finite(self._clip_max), "clipped_percent_mean": finite(self._clip_sum / n),
            "interference_bursts_max": [int(v) for v in self._bursts_max],
            "interference_bursts_total": [int(v) for v in self._bursts_total],
            "interference_share_percent_max": finite(self._share_max),
            "interference_share_percent_mean": finite(self._share_sum / n),
            "noise_floor_db_mean": finite(floor_mean), "noise_floor_db_max": finite(self._floor_max),
            "dc_offset_counts_max": finite(self._dc_max), "image_rejection_db_min": finite(self._irr_min),
        }
        assert tuple(out) == tuple(name for name, _ in FRONTEND_SUMMARY_FIELDS)
        assert all(name in out for name in FRONTEND_SUMMARY_COUNTS)
        return out

    def health(self) -> dict | None:
        """health's `frontend` map over the frames added since the last reset; None without any."""
        if not self.frames:
            return None
        return {"frames": self.frames, "frames_with_warnings": self.frames_with_warnings,
                "warnings": {k: v for k, v in self.by_cause.items() if v}, "channels": self.channels()}

