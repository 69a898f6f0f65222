"""Plausibility of a sensor description: values no FMCW front end takes, most often a unit slip.

A sensor file with `start_frequency_hz = 77.0` (GHz meant) or `slope_hz_per_s = 30.0` (MHz/us meant)
is well-formed TOML with positive numbers, and every figure derived from it is nonsense. These checks
refuse such a file, name the file, section, field and value, and say which unit was probably meant:

    yard.toml: [chirp] start_frequency_hz = 77.0: far below any radar carrier (1 GHz .. 300 GHz); GHz meant? 77.0e9

The hint rescales the value by a power of 1000 (an SI prefix) into the limits, choosing the
prefix that lands nearest (in log scale) to a typical value, and names the unit that power stands
for where there is one.

The limits, and why (the ranges of the trade are common practice for FMCW automotive and
industrial front ends; the figures marked "from memory" are not from a document at hand):

    carrier (start frequency)   1 GHz .. 300 GHz   FMCW sensors sit in the microwave and millimetre-
                                                   wave bands: 24 GHz ISM, 60 GHz, 76-81 GHz
                                                   automotive, 120 / 140 GHz research front ends; 300 GHz
                                                   is the top of the millimetre-wave band (EHF)
    chirp slope                 1 MHz/ms .. 1 GHz/us  fast chirps of automotive front ends run at
                                                   ~10..250 MHz/us, the slow sweeps of industrial level
                                                   gauges at ~1 GHz over a few ms to tens of ms (from memory)
    ADC sample rate             1 kHz .. 1 GHz     IF ADCs of these front ends sample at ~0.1..100 MS/s
                                                   (from memory); outside the wider span is no radar IF
    bandwidth swept during      1 MHz .. 50 GHz    range resolution c / (2 B) from 150 m to 3 mm; the
    sampling (S N / fs)                            76-81 GHz band allows 5 GHz, research sweeps reach
                                                   some tens of GHz (from memory)
    ramp time, chirp period     100 ns .. 100 ms   fast chirps last ~10..100 us, slow level-gauge sweeps
                                                   up to tens of ms (from memory)
    ADC start delay             <= 100 ms          it lies inside the ramp, so no longer than the longest ramp
    ramp vs ADC window          ramp <= 100 x (ADC start delay + ADC window): front ends sample most of
                                                   the ramp (typically well over half; from memory); a ramp
                                                   100 times longer would sweep 99 % of its band unseen
    idle time                   chirp period <= 100 x ramp time: the idle gap between chirps is a few to
                                                   tens of microseconds (from memory); low duty cycles come
                                                   from the gap between frames, not between chirps
    frame period                <= 10 s            a real-time sensor; frame rates of 1..100 Hz are
                                                   common practice
    IF filter cutoff            0.1 .. 10 x the IF band edge (fs complex, fs / 2 real): below, the filter
                                                   removes nine tenths of the ranges the ADC covers;
                                                   above, it does not act on the IF band at all
    IF filter order             1 .. 16            analog IF filters are of low order (from memory: 2..8)

The rules between fields that are not about plausibility (the ramp outlasts the ADC window, the
chirp period the ramp, the frame its chirps) stay in sensor.py beside the reader of each section.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from .config import Section

FREQUENCY_UNITS = {3: "kHz", 6: "MHz", 9: "GHz"}
TIME_UNITS = {-3: "ms", -6: "us", -9: "ns"}
SLOPE_UNITS = {6: "MHz/s", 9: "MHz/ms", 12: "MHz/us", 15: "GHz/us"}

RAMP_PER_ADC_END_MAX = 100.0  # ramp_end_time_s <= this x (adc_start_delay_s + ADC window)
PERIOD_PER_RAMP_MAX = 100.0  # chirp_period_s <= this x ramp_end_time_s
IF_CUTOFF_PER_BAND = (0.1, 10.0)  # IF filter cutoff within these multiples of the IF band edge
IF_ORDER_MAX = 16


def engineering(x: float) -> str:
    """x in engineering notation, as one would type it into the file: 77.0e9, 30.0e12, 32.0e-6."""
    if x == 0 or not math.isfinite(x):
        return repr(float(x))
    exp = 3 * math.floor(math.log10(abs(x)) / 3)
    mantissa = float(f"{x / 10.0 ** exp:.6g}")
    if abs(mantissa) >= 1000.0:  # rounding carried into the next power of 1000
        mantissa, exp = mantissa / 1000.0, exp + 3
    return repr(mantissa) if exp == 0 else f"{mantissa!r}e{exp}"


def unit_hint(value: float, low: float, high: float, typical: float, units: dict[int, str]) -> str:
    """'; GHz meant? 77.0e9': `value` rescaled by the power of 1000 that brings it into [low, high]
    nearest to `typical` (log scale), named by its unit where `units` has one; '' if none fits."""
    fits = [e for e in range(-15, 16, 3) if e and low <= value * 10.0 ** e <= high]
    if not fits or value <= 0:
        return ""
    e = min(fits, key=lambda k: abs(math.log10(value * 10.0 ** k / typical)))
    meant = engineering(value * 10.0 ** e)
    return f"; {units[e]} meant? {meant}" if e in units else f"; {meant} meant?"


@dataclass(frozen=True)
class Limit:
    """A plausible span of one field, what it is and the units a slip is likely made in."""

    low: float
    high: float
    typical: float
    what: str  # "radar carrier"
    span: str  # "1 GHz .. 300 GHz"
    units: dict[int, str] = field(default_factory=dict)

    def check(self, section: Section, name: str, value: float) -> None:
        if self.low <= value <= self.high:
            return
        side = "below" if value < self.low else "above"
        raise section.fail(name, section.table.get(name, value),
                           f"far {side} any {self.what} ({self.span})"
                           + unit_hint(value, self.low, self.high, self.typical, self.units))


CARRIER = Limit(1.0e9, 300.0e9, 60.0e9, "radar carrier", "1 GHz .. 300 GHz", FREQUENCY_UNITS)
SLOPE = Limit(1.0e9, 1.0e15, 30.0e12, "FMCW chirp slope", "1 MHz/ms .. 1 GHz/us", SLOPE_UNITS)
SAMPLE_RATE = Limit(1.0e3, 1.0e9, 10.0e6, "radar IF sample rate", "1 kHz .. 1 GHz", FREQUENCY_UNITS)
CHIRP_TIME = Limit(100.0e-9, 0.1, 50.0e-6, "chirp", "100 ns .. 100 ms", TIME_UNITS)
ADC_DELAY = Limit(0.0, 0.1, 5.0e-6, "ADC start delay inside a chirp", "0 .. 100 ms", TIME_UNITS)
FRAME_PERIOD = Limit(0.0, 10.0, 0.05, "real-time frame period", "at most 10 s", TIME_UNITS)
SAMPLED_BANDWIDTH_HZ = (1.0e6, 50.0e9)


def check_chirp_fields(c: Section, chirp: dict) -> None:
    """Each [chirp] field on its own, before the rules between them."""
    CARRIER.check(c, "start_frequency_hz", chirp["start_frequency_hz"])
    SLOPE.check(c, "slope_hz_per_s", chirp["slope_hz_per_s"])
    SAMPLE_RATE.check(c, "sample_rate_hz", chirp["sample_rate_hz"])
    ADC_DELAY.check(c, "adc_start_delay_s", chirp["adc_start_delay_s"])
    CHIRP_TIME.check(c, "ramp_end_time_s", chirp["ramp_end_time_s"])
    CHIRP_TIME.check(c, "chirp_period_s", chirp["chirp_period_s"])


def check_chirp_timing(c: Section, chirp: dict) -> None:
    """After the ramp is known to outlast the ADC window and the period the ramp: the ramp is
    mostly sampled, the idle gap no longer than 99 % of the chirp, and the bandwidth swept during
    sampling one a front end sweeps."""
    adc_end = chirp["adc_start_delay_s"] + chirp["samples_per_chirp"] / chirp["sample_rate_hz"]
    ramp, period = chirp["ramp_end_time_s"], chirp["chirp_period_s"]
    if ramp > RAMP_PER_ADC_END_MAX * adc_end:
        raise c.fail("ramp_end_time_s", c.table.get("ramp_end_time_s", ramp),
                     f"more than {RAMP_PER_ADC_END_MAX:g} times the end of the ADC window (adc_start_delay_s + "
                     f"samples_per_chirp / sample_rate_hz = {engineering(adc_end)} s): the ramp would sweep over "
                     f"99 % of its band unsampled"
                     + unit_hint(ramp, adc_end, RAMP_PER_ADC_END_MAX * adc_end, 1.2 * adc_end, TIME_UNITS))
    if period > PERIOD_PER_RAMP_MAX * ramp:
        raise c.fail("chirp_period_s", c.table.get("chirp_period_s", period),
                     f"more than {PERIOD_PER_RAMP_MAX:g} times ramp_end_time_s = {engineering(ramp)} s: an idle gap "
                     f"of over 99 % of each chirp (idle times are microseconds; long pauses belong between frames)"
                     + unit_hint(period, ramp, PERIOD_PER_RAMP_MAX * ramp, 1.25 * ramp, TIME_UNITS))
    from .sensor import SPEED_OF_LIGHT_MPS  # sensor.py imports this module

    slope = chirp["slope_hz_per_s"]
    window_s = chirp["samples_per_chirp"] / chirp["sample_rate_hz"]
    bandwidth = slope * window_s
    low, high = SAMPLED_BANDWIDTH_HZ
    if not low <= bandwidth <= high:  # no unit hint: each field is plausible on its own here
        raise c.fail("slope_hz_per_s", c.table.get("slope_hz_per_s", slope),
                     f"the bandwidth swept during sampling, slope_hz_per_s * samples_per_chirp / sample_rate_hz = "
                     f"{engineering(bandwidth)} Hz (range resolution {engineering(SPEED_OF_LIGHT_MPS / (2 * bandwidth))} m), "
                     f"is {'below' if bandwidth < low else 'above'} what FMCW front ends sweep (1 MHz .. 50 GHz: "
                     f"range resolution 150 m .. 3 mm)")


def check_frame_period(fr: Section, frame_period_s: float) -> None:
    FRAME_PERIOD.check(fr, "frame_period_s", frame_period_s)


def check_if_filter(f: Section, cutoff_hz: float, if_band_hz: float) -> None:
    low, high = (k * if_band_hz for k in IF_CUTOFF_PER_BAND)
    if not low <= cutoff_hz <= high:
        raise f.fail("cutoff_hz", f.table.get("cutoff_hz", cutoff_hz),
                     f"must lie within {IF_CUTOFF_PER_BAND[0]:g} .. {IF_CUTOFF_PER_BAND[1]:g} times the IF band edge "
                     f"{engineering(if_band_hz)} Hz (sample_rate_hz, halved for real sampling)"
                     + unit_hint(cutoff_hz, low, high, 1.2 * if_band_hz, FREQUENCY_UNITS))
