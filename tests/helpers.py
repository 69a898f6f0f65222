"""Shared builders for tests: sensor descriptions as text, with fields overridable per test."""

from __future__ import annotations

from pathlib import Path

from cubecast.daemon.sensor import parse_sensor

SAMPLES = Path(__file__).resolve().parent.parent / "replay_samples"
YARD_SENSOR = SAMPLES / "yard_sensor.toml"


def sensor_text(*, n_tx_az: int = 2, n_rx: int = 4, tx_spacing_hw: int | None = None, elevation_tx: bool = True,
                loops: int = 32, samples: int = 128, sample_rate_hz: float = 5.0e6, slope: float = 30.0e12,
                f_start_hz: float = 77.0e9, scheme: str = "tdm", tx_order: list[int] | None = None,
                bpm_codes: list[list[int]] | None = None, sampling: str = "complex",
                sample_type: str = "int16", swap_iq: bool = False, conjugate: bool = False,
                chirp_period_s: float = 40.0e-6, extra: str = "") -> str:
    """A TDM/BPM sensor: `n_tx_az` TX on the azimuth row `tx_spacing_hw` half-wavelengths apart
    (default n_rx, which makes a filled virtual row), optionally one TX raised by one half-wavelength."""
    spacing = n_rx if tx_spacing_hw is None else tx_spacing_hw
    tx = [[k * spacing, 0] for k in range(n_tx_az)]
    if elevation_tx:
        tx.append([spacing // 2, 1])
    rx = [[l, 0] for l in range(n_rx)]
    n_tx = len(tx)
    slots = n_tx if scheme == "tdm" else len(bpm_codes)
    mimo = (f'scheme = "tdm"\ntx_order = {tx_order or list(range(n_tx))}' if scheme == "tdm"
            else f'scheme = "bpm"\ncodes = {bpm_codes}')
    window_s = samples / sample_rate_hz
    return f"""
[sensor]
id = "test-sensor"

[chirp]
start_frequency_hz = {f_start_hz!r}
slope_hz_per_s = {slope!r}
sample_rate_hz = {sample_rate_hz!r}
samples_per_chirp = {samples}
adc_start_delay_s = 5.0e-6
ramp_end_time_s = {5.0e-6 + window_s + 1.0e-6!r}
chirp_period_s = {max(chirp_period_s, 5.0e-6 + window_s + 2.0e-6)!r}

[frame]
chirps_per_frame = {loops * slots}
frame_period_s = 0.1

[antennas]
tx_positions_half_wavelength = {tx}
rx_positions_half_wavelength = {rx}

[mimo]
{mimo}

[link]
tx_power_dbm = 12.0
tx_gain_dbi = 10.0
rx_gain_dbi = 10.0
noise_figure_db = 12.0
system_loss_db = 3.0
noise_rms_counts = 8.0

[adc]
sampling = "{sampling}"
sample_type = "{sample_type}"
full_scale = 8191
swap_iq = {str(swap_iq).lower()}
conjugate = {str(conjugate).lower()}
{extra}
"""


def make_sensor(**kw):
    return parse_sensor(sensor_text(**kw), "test")
