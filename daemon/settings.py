"""Processing settings: one TOML section, `[processing]`, every field optional.

The defaults work for the bundled sensor. Unknown fields are errors (a typo is never silently
ignored). See README "Processing settings" for the table of fields.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .config import Document, parse_toml, read_toml
from .errors import CubecastError

CFAR_KINDS = ("ca", "os", "go", "so")
INTERFERENCE_MITIGATIONS = ("off", "zero", "interpolate")   # chain/frontend.py: off = detect and count only
WINDOW_NAMES = ("rect", "hann", "hamming", "blackman", "kaiser")   # chain/windows.py makes each
ANGLE_METHODS = ("dml", "esprit", "music", "fft")  # README "Several sources in one cell"


@dataclass(frozen=True)
class ProcessingSettings:
    # range FFT
    range_window: str = "hann"
    range_kaiser_beta: float = 6.0
    range_fft_size: int = 0  # 0 = samples per chirp; else a size >= samples (zero padding)
    remove_static: bool = False  # subtract each channel's mean over the loops (static returns)
    # front end, before the range FFT (chain/frontend.py)
    dc_removal: bool = True  # subtract each RX channel's complex mean over the frame
    interference_mitigation: str = "interpolate"  # flagged bursts: off (count only), zero, interpolate (slow time)
    interference_threshold_db: float = 10.0  # difference power to the next loop over the channel's robust level
    interference_guard_samples: int = 3  # flagged runs widened by this many samples on each side
    leakage_max_range_m: float = 0.0  # static component removed in the range bins below this (0 = off)
    # Doppler FFT
    doppler_window: str = "hann"
    doppler_kaiser_beta: float = 6.0
    doppler_fft_size: int = 0  # 0 = loops per frame
    # MIMO
    doppler_compensation: bool = True
    velocity_unfolding: bool = True
    unfolding_margin_db: float = 1.0
    # detection
    cfar_kind: str = "os"
    cfar_train_range: int = 8
    cfar_guard_range: int = 3
    cfar_train_doppler: int = 4
    cfar_guard_doppler: int = 2
    cfar_pfa: float = 1e-6
    cfar_os_rank_fraction: float = 0.75
    min_range_m: float = 0.5
    max_range_m: float = 0.0  # 0 = the sensor's maximum range
    # angle
    angle_fft_size_azimuth: int = 0  # 0 = automatic: max(64, next power of two >= 2 x the columns)
    angle_fft_size_elevation: int = 0  # 0 = automatic: max(16, next power of two >= 4 x the rows)
    angle_peak_threshold_db: float = -9.0
    angle_max_peaks: int = 3  # sources per range-Doppler cell at most (one, two or three)
    angle_split_false_alarm: float = 0.01  # design probability that one source is reported as two
    angle_model_error_db: float = -25.0  # split test's floor: the array's relative model error (README)
    angle_method: str = "dml"  # "dml": maximum likelihood over the true elements; "esprit", "music": dml with
    # smoothed-subspace proposals (chain/angle_subspace.py); "fft": the FFT peaks only
    # output
    max_points: int = 1024

    def validate(self, origin: str | None = None) -> "ProcessingSettings":
        pre = f"{origin}: " if origin else ""

        def fail(name: str, rule: str) -> CubecastError:
            return CubecastError(f"{pre}[processing] {name} = {getattr(self, name)!r}: {rule}")

        for name in ("range_window", "doppler_window"):
            if getattr(self, name) not in WINDOW_NAMES:
                raise fail(name, f"must be one of {', '.join(WINDOW_NAMES)}")
        if self.interference_mitigation not in INTERFERENCE_MITIGATIONS:
            raise fail("interference_mitigation", f"must be one of {', '.join(INTERFERENCE_MITIGATIONS)}")
        if not 3.0 <= self.interference_threshold_db <= 40.0:
            raise fail("interference_threshold_db", "must be within 3..40 dB")
        if not 0 <= self.interference_guard_samples <= 64:
            raise fail("interference_guard_samples", "must be within 0..64")
        if self.leakage_max_range_m < 0:
            raise fail("leakage_max_range_m", "must be at least 0 (0 = off)")
        if self.angle_method not in ANGLE_METHODS:
            raise fail("angle_method", f"must be one of {', '.join(ANGLE_METHODS)}")
        if self.cfar_kind not in CFAR_KINDS:
            raise fail("cfar_kind", f"must be one of {', '.join(CFAR_KINDS)}")
        for name in ("range_fft_size", "doppler_fft_size"):
            v = getattr(self, name)
            if v != 0 and (v < 8 or v & (v - 1)):
                raise fail(name, "must be 0 (no padding) or a power of two of at least 8")
        for name in ("angle_fft_size_azimuth", "angle_fft_size_elevation"):
            v = getattr(self, name)
            if v < 0 or (v and v & (v - 1)):
                raise fail(name, "must be 0 (automatic) or a power of two")
        for name in ("cfar_train_range", "cfar_train_doppler"):
            if getattr(self, name) < 1:
                raise fail(name, "must be at least 1")
        for name in ("cfar_guard_range", "cfar_guard_doppler"):
            if getattr(self, name) < 0:
                raise fail(name, "must be at least 0")
        if not 0 < self.cfar_pfa < 0.5:
            raise fail("cfar_pfa", "must be between 0 and 0.5")
        if not 0 < self.cfar_os_rank_fraction <= 1:
            raise fail("cfar_os_rank_fraction", "must be in (0, 1]")
        if self.min_range_m < 0:
            raise fail("min_range_m", "must be at least 0")
        if self.max_range_m < 0 or (self.max_range_m and self.max_range_m <= self.min_range_m):
            raise fail("max_range_m", "must be 0 (sensor maximum) or above min_range_m")
        if self.angle_max_peaks < 1:
            raise fail("angle_max_peaks", "must be at least 1")
        if not 0 < self.angle_split_false_alarm < 1:
            raise fail("angle_split_false_alarm", "must be a probability between 0 and 1 (exclusive)")
        if not self.angle_model_error_db <= 0:
            raise fail("angle_model_error_db", "is relative to the cell's energy and must be <= 0")
        if self.angle_peak_threshold_db > 0:
            raise fail("angle_peak_threshold_db", "is relative to the strongest peak and must be <= 0")
        if self.max_points < 1:
            raise fail("max_points", "must be at least 1")
        for name in ("range_kaiser_beta", "doppler_kaiser_beta"):
            if not 0 <= getattr(self, name) <= 50:
                raise fail(name, "must be within 0..50")
        if self.unfolding_margin_db < 0:
            raise fail("unfolding_margin_db", "must be at least 0")
        return self


def settings_from_document(doc: Document) -> ProcessingSettings:
    """Validate parsed settings: only a [processing] section, each field of the type of its default."""
    doc.check_sections(("processing",), hint="settings live in [processing]")
    values = doc.section("processing", required=False).dataclass_values(ProcessingSettings)
    return ProcessingSettings(**values).validate(doc.origin)


def parse_settings(text: str, origin: str | None = None) -> ProcessingSettings:
    return settings_from_document(parse_toml(text, origin))


def load_settings(path: str | Path | None) -> ProcessingSettings:
    if path is None:
        return ProcessingSettings().validate()
    return settings_from_document(read_toml(path, "settings"))
