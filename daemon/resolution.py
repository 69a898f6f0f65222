"""`bench --resolution`: how well the angle stage separates sources in one range-Doppler cell.

Monte Carlo on virtual snapshots (the angle stage alone, AngleEstimator with the chain's default
settings and FFT sizes, once per angle method of METHODS on the same draws), for three arrays: 8- and 16-element uniform linear arrays at half a
wavelength and the bundled yard sensor's virtual array (two rows, 8 columns). Per trial a fresh
snapshot: sources as plane waves (the project's convention, angle.py), circular complex Gaussian
noise of unit power per element, the SNR per element |a|^2 / sigma^2 of each (equal) source.

Separation is in units of the Rayleigh limit 2 / N_x in direction cosine u (N_x grid columns: the
first null of a uniform aperture, common practice), pairs centred at a random u in [-0.3, 0.3] at
w = 0 (yard: a random w in [-0.2, 0.2], both sources at it), with a random common phase.

A pair is resolved when the snapshot gives exactly two sources and, sorted by u, each lies within the
gate of its true source: a distance in (u, w) below a quarter of the separation. A triple likewise
with three sources. A single source is split when it gives two or more.

Cases: "quadrature" (equal pair, relative phase 90 deg at the array's centroid), "random" (equal pair,
uniform relative phase), "unequal" (the second source 10 dB weaker, random phase), "three" (three
equal sources at the separation's spacing, random phases); and the single-source split rate per SNR.
Also the RMSE of the resolved pairs' u over the reported sigma (each source's own bound,
bounds.source_bounds, at the true SNR per element of the snapshot).
"""

from __future__ import annotations

import logging
import math
import time
from pathlib import Path

import numpy as np

from .errors import CubecastError

log = logging.getLogger(__name__)

SEPARATIONS = (0.3, 0.5, 0.7, 1.0, 1.4, 2.0)  # x the Rayleigh limit
SNR_DB = (10.0, 20.0, 30.0, 40.0)  # per element, each source
CASES = ("quadrature", "random", "unequal", "three")
METHODS = ("dml", "esprit", "music")  # angle_method values compared (fft resolves nothing below 1 R)
TRIALS = 200
UNEQUAL_DB = -10.0
GATE_FRACTION = 0.25  # of the separation
WAVELENGTH_M = 3.9e-3  # of the linear arrays (angles depend only on positions in wavelengths)


def arrays() -> list[tuple[str, np.ndarray, float]]:
    """(name, virtual positions in metres, wavelength) of the arrays measured."""
    out = []
    for n in (8, 16):
        x = (np.arange(n) - (n - 1) / 2.0) * WAVELENGTH_M / 2.0
        out.append((f"ula{n}", np.stack([x, np.zeros(n), np.zeros(n)], axis=1), WAVELENGTH_M))
    yard = Path(__file__).resolve().parents[1] / "replay_samples" / "yard_sensor.toml"
    if yard.exists():
        from .sensor import load_sensor
        s = load_sensor(yard)
        out.append(("yard", s.virtual_positions_m, s.wavelength_m))
    else:
        log.info("resolution: no bundled yard sensor at %s; the linear arrays only", yard)
    return out


def _estimator(pos: np.ndarray, lam: float, method: str = "dml"):
    from .chain.angle import AngleEstimator, AngleSettings, VirtualGrid
    from .settings import ProcessingSettings
    s = ProcessingSettings().validate()
    grid = VirtualGrid.from_positions(pos, lam)
    n_az = s.angle_fft_size_azimuth or max(64, 1 << max(0, math.ceil(math.log2(2 * grid.n_x))))
    n_el = (s.angle_fft_size_elevation or max(16, 1 << max(0, math.ceil(math.log2(4 * grid.n_z))))) if grid.n_z > 1 else 1
    return AngleEstimator(grid, AngleSettings(fft_size_azimuth=n_az, fft_size_elevation=n_el,
                                              peak_threshold_db=s.angle_peak_threshold_db,
                                              max_peaks=s.angle_max_peaks,
                                              split_false_alarm=s.angle_split_false_alarm,
                                              model_error_db=s.angle_model_error_db,
                                              method=method))


class _Scene:
    """Plane waves on one array: positions centred (phases at the centroid)."""

    def __init__(self, pos: np.ndarray, lam: float):
        self.pos = pos - pos.mean(axis=0)
        self.k = 2.0 * np.pi / lam
        self.n = pos.shape[0]
        self.planar = np.ptp(pos[:, 2]) > 0

    def waves(self, u, w, amp):
        return amp[:, None] * np.exp(-1j * self.k * (np.outer(u, self.pos[:, 0]) + np.outer(w, self.pos[:, 2])))


def _matched(res, n: int, u_true: np.ndarray, w_true: np.ndarray, gate: float) -> np.ndarray:
    """bool[n]: exactly as many sources as true ones, each (sorted by u) within `gate` of its own."""
    m = u_true.shape[1]
    counts = np.bincount(res.det_index, minlength=n)
    ok = counts == m
    rows = np.flatnonzero(ok[res.det_index])
    if rows.size == 0:
        return ok
    u = res.u[rows].astype(np.float64).reshape(-1, m)
    w = res.w[rows].astype(np.float64).reshape(-1, m)
    order = np.argsort(u, axis=1)
    u, w = np.take_along_axis(u, order, 1), np.take_along_axis(w, order, 1)
    d = np.flatnonzero(ok)
    dist = np.hypot(u - u_true[d], w - w_true[d])
    ok[d] = np.all(dist < gate, axis=1)
    return ok


def _case(scene, est, case: str, frac: float, snr_db: float, trials: int, rng, n_cols: int) -> dict:
    du = frac * 2.0 / n_cols
    m = 3 if case == "three" else 2
    centre = rng.uniform(-0.3, 0.3, trials)
    u = centre[:, None] + du * (np.arange(m) - (m - 1) / 2.0)
    w = np.repeat(rng.uniform(-0.2, 0.2, trials)[:, None] if scene.planar else np.zeros((trials, 1)), m, axis=1)
    amp = np.full((trials, m), 10.0 ** (snr_db / 20.0), complex) * np.exp(2j * np.pi * rng.random((trials, 1)))
    if case == "quadrature":
        amp[:, 1] *= 1j
    else:
        amp[:, 1:] *= np.exp(2j * np.pi * rng.random((trials, m - 1)))
    if case == "unequal":
        amp[:, 1] *= 10.0 ** (UNEQUAL_DB / 20.0)
    clean = sum(scene.waves(u[:, k], w[:, k], amp[:, k]) for k in range(m))
    noise = (rng.standard_normal(clean.shape) + 1j * rng.standard_normal(clean.shape)) / math.sqrt(2.0)
    res = est.estimate((clean + noise).astype(np.complex64))
    ok = _matched(res, trials, u, w, GATE_FRACTION * du)
    out = {"case": case, "separation_rayleigh": frac, "snr_db": snr_db, "resolved": float(ok.mean())}
    if case != "three" and ok.any():
        rows = np.flatnonzero(ok[res.det_index])
        ur = res.u[rows].astype(np.float64).reshape(-1, 2)
        order = np.argsort(ur, axis=1)
        err = np.take_along_axis(ur, order, 1) - u[ok]
        el_snr = np.sum(np.abs(clean[ok]) ** 2, axis=1) / scene.n  # noise power 1
        var = (res.crb_unit[rows, 0].reshape(-1, 2) / (2.0 * el_snr[:, None] * res.snr_share[rows].reshape(-1, 2)))
        var = np.take_along_axis(var, order, 1)
        out["rmse_over_sigma_u"] = [round(float(np.sqrt(np.mean(err[:, k] ** 2) / np.mean(var[:, k]))), 3)
                                    for k in range(2)] if ok.sum() >= 20 else None
    return out


def _single(scene, est, snr_db: float, trials: int, rng) -> float:
    u = rng.uniform(-0.6, 0.6, trials)
    w = rng.uniform(-0.25, 0.25, trials) if scene.planar else np.zeros(trials)
    amp = 10.0 ** (snr_db / 20.0) * np.exp(2j * np.pi * rng.random(trials))
    clean = scene.waves(u, w, amp)
    noise = (rng.standard_normal(clean.shape) + 1j * rng.standard_normal(clean.shape)) / math.sqrt(2.0)
    res = est.estimate((clean + noise).astype(np.complex64))
    return float(np.mean(np.bincount(res.det_index, minlength=trials) >= 2))


def run_resolution(trials: int = TRIALS, seed: int = 0, methods: tuple[str, ...] = METHODS) -> dict:
    """The whole sweep: per array, method, case, separation and SNR the resolved fraction (and the
    single-source split rate per SNR, on 10 x trials sources). Every method sees the same draws (the
    generator restarts from `seed` for each array and method)."""
    if trials < 20:
        raise CubecastError(f"--trials {trials}: a resolution rate needs at least 20 trials")
    from .settings import ANGLE_METHODS, ProcessingSettings
    for m in methods:
        if m not in ANGLE_METHODS:
            raise CubecastError(f"resolution: angle method {m!r}: must be one of {', '.join(ANGLE_METHODS)}")
    defaults = ProcessingSettings().validate()
    alpha = defaults.angle_split_false_alarm
    t0 = time.perf_counter()
    out = []
    for name, pos, lam in arrays():
        by_method = {}
        for method in methods:
            t1 = time.perf_counter()
            rng = np.random.default_rng(seed)
            scene, est = _Scene(pos, lam), _estimator(pos, lam, method)
            n_cols = est.grid.n_x
            rows = [_case(scene, est, case, frac, snr, trials, rng, n_cols)
                    for case in CASES for frac in SEPARATIONS for snr in SNR_DB]
            single = [{"snr_db": snr, "split": _single(scene, est, snr, 10 * trials, rng)} for snr in SNR_DB]
            by_method[method] = {"rows": rows, "single": single}
            log.info("resolution: %s, %s in %.1f s", name, method, time.perf_counter() - t1)
        main = defaults.angle_method if defaults.angle_method in by_method else methods[0]
        out.append({"name": name, "n_virtual": int(pos.shape[0]), "columns": int(n_cols),
                    "rayleigh_u": 2.0 / n_cols, "method": main, **by_method[main], "methods": by_method})
    return {"trials": trials, "seed": seed, "design_split": alpha, "methods": list(methods), "cases": list(CASES),
            "separations_rayleigh": list(SEPARATIONS), "snr_db": list(SNR_DB), "unequal_db": UNEQUAL_DB,
            "gate": f"each true source has its own reported one within {GATE_FRACTION:g} x the separation "
                    "in (u, w), and no other is reported",
            "arrays": out, "seconds": round(time.perf_counter() - t0, 1)}


def print_resolution_table(result: dict) -> None:
    """The sweep as plain text tables (the result of the command, to stdout)."""
    seps = result["separations_rayleigh"]
    print(f"resolution over {result['trials']} trials per cell (seed {result['seed']}); resolved: "
          f"{result['gate']}; SNR per element of each source (unequal: the second {result['unequal_db']:g} dB)")
    print("\nat 0.5 x the Rayleigh limit, 20 dB per element, per angle_method (resolved; split: single "
          "sources at 20 dB):")
    print(f"  {'array':<7}{'method':<8}" + "".join(f"{c:>12}" for c in result["cases"]) + f"{'split':>9}")
    for arr in result["arrays"]:
        for method, run in arr.get("methods", {arr.get("method", "dml"): arr}).items():
            cells = {r["case"]: r["resolved"] for r in run["rows"] if r["separation_rayleigh"] == 0.5
                     and r["snr_db"] == 20.0}
            split = next((s["split"] for s in run["single"] if s["snr_db"] == 20.0), float("nan"))
            print(f"  {arr['name']:<7}{method:<8}"
                  + "".join(f"{100 * cells.get(c, float('nan')):>11.1f}%" for c in result["cases"])
                  + f"{100 * split:>8.2f}%")
    for arr in result["arrays"]:
        for method, run in arr.get("methods", {arr.get("method", "dml"): arr}).items():
            print(f"\n{arr['name']}, angle_method {method}: {arr['n_virtual']} elements, "
                  f"{arr['columns']} columns, Rayleigh limit {arr['rayleigh_u']:.4f} in u")
            print(f"  {'case':<11}{'SNR dB':>7}  " + "".join(f"{s:>7g}R" for s in seps) + "   RMSE/sigma u at 1R")
            for case in result["cases"]:
                for snr in result["snr_db"]:
                    cells = [r for r in run["rows"] if r["case"] == case and r["snr_db"] == snr]
                    ratio = next((r.get("rmse_over_sigma_u") for r in cells if r["separation_rayleigh"] == 1.0), None)
                    text = "" if ratio is None else " / ".join(f"{v:.2f}" for v in ratio)
                    print(f"  {case:<11}{snr:>7g}  " + "".join(f"{100 * r['resolved']:>7.1f}%" for r in cells)
                          + f"   {text}")
            print("  single source split (design {:.3g}): ".format(result["design_split"])
                  + ", ".join(f"{s['snr_db']:g} dB {100 * s['split']:.2f}%" for s in run["single"]))
