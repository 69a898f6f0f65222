"""The display map: a range-Doppler power map max-pooled to a size a viewer can take, in dB above
its median (the noise floor). Pure numpy."""

from __future__ import annotations

import math

import numpy as np


def pool_rdmap(power: np.ndarray, range_bin_m: float, velocity_bin_mps: float, max_range_cells: int = 128,
               max_doppler_cells: int = 64) -> tuple[np.ndarray, float, float, float, float]:
    """Max-pool a range-Doppler power map (float [range, doppler], Doppler fft-shifted: column j is
    (j - n_doppler // 2) velocity bins) to at most max_range_cells x max_doppler_cells and convert to
    dB relative to the median of the full-resolution map (0 dB = the noise floor).
    Returns (values_db float32, range_start_m, range_step_m, velocity_start_mps, velocity_step_mps),
    the start being the centre of the first pooled cell."""
    n_r, n_d = power.shape
    fr = -(-n_r // max_range_cells)
    fd = -(-n_d // max_doppler_cells)
    pr, pd = -(-n_r // fr) * fr, -(-n_d // fd) * fd
    src = power
    if (pr, pd) != (n_r, n_d):
        src = np.full((pr, pd), -np.inf, np.float32)
        src[:n_r, :n_d] = power
    pooled = src.reshape(pr // fr, fr, pd // fd, fd).max(axis=(1, 3)) if (fr, fd) != (1, 1) else src
    tiny = np.float32(1e-30)
    floor = max(float(np.median(power)), float(tiny))
    values = (10.0 * np.log10(np.maximum(pooled, tiny)) - 10.0 * math.log10(floor)).astype(np.float32)
    range_start = 0.5 * (fr - 1) * range_bin_m
    velocity_start = (0.5 * (fd - 1) - n_d // 2) * velocity_bin_mps
    return values, range_start, fr * range_bin_m, velocity_start, fd * velocity_bin_mps
