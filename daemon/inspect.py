"""One range-Doppler cell of one frame, looked at with the chain (`cubecast inspect`). Pure: a
Pipeline and a canonical frame in, a plain dict out (numbers and lists only, ready for JSON).

The frame runs through the Pipeline as in `process`; then, at the cell nearest the asked range and
velocity:

- the cell's numbers: range and velocity of the cell centre (folded, as the map shows it, and
  unfolded by the TDM hypothesis the asked velocity implies), the map's power, the CFAR's noise
  statistic, threshold and noise estimate there, the per-channel SNR (power / noise - 1, as the
  CFAR defines it), whether the cell crosses the threshold and whether the chain detected it, and the
  chain's points of the detection at this cell with their sigmas (each point belongs to the detection
  nearest its refined range and velocity; those of detections in the eight neighbouring cells are
  listed apart, since a refined point may lie nearer a neighbour's centre);
- the range profile at that Doppler column and the Doppler spectrum at that range bin (the
  detection map, with the CFAR threshold), in dB over the map's median (0 dB is the display's noise
  floor, as in the viewer's map);
- the virtual snapshot of the cell: the spectrum's slot values at the cell, rotated by the Doppler
  phase of each slot and decoded into the virtual array (the chain's MimoDecoder), with the
  calibration applied; per virtual channel its amplitude in dB over that channel's noise and its
  phase in degrees;
- its angle spectra: the zero-padded FFT of the snapshot on the virtual grid (the chain's sizes and
  taper) along azimuth through the estimate's elevation, and along elevation through its azimuth,
  in dB over the per-channel noise (a plane wave of amplitude a gives |a|^2 over the noise at its
  peak); with the estimate (the chain's point in the cell, else the angle estimator on this
  snapshot) and its Cramér-Rao interval.

The Doppler phase is that of the chain's point in the cell (its refined, unfolded velocity) when
there is one, else that of the cell centre, unfolded as the asked velocity says.
"""

from __future__ import annotations

import math

import numpy as np

from .chain.angle_peaks import bin_direction_cosines
from .chain.bounds import sigma_azimuth_deg, sigma_elevation_deg
from .chain.cfar import SNR_FLOOR_LINEAR
from .chain.pipeline import Pipeline
from .chain.points import POINT_FIELDS
from .chain.virtual_grid import grid_window
from .errors import CubecastError
from .sensor import SPEED_OF_LIGHT_MPS

TINY = 1e-30


def _db(x) -> np.ndarray:
    return 10.0 * np.log10(np.maximum(np.asarray(x, np.float64), TINY))


def _num(x) -> float | None:
    """A JSON number: finite floats as they are, inf and nan as null."""
    x = float(x)
    return x if math.isfinite(x) else None


def _nums(a) -> list:
    return [_num(v) for v in np.asarray(a, np.float64).reshape(-1)]


class CellGeometry:
    """Where a (range, velocity) falls on the pipeline's map: bins, folding and coverage."""

    def __init__(self, pipe: Pipeline):
        s = pipe.sensor
        self.n_range, self.n_doppler = pipe.detection_map.shape
        self.half = self.n_doppler // 2
        self.range_bin_m = float(pipe.range_fft.bin_m)
        self.range_bias_m = float(pipe.range_bias_m)
        self.doppler_bin_hz = float(pipe.doppler_fft.bin_hz)
        # the display's velocity bin, v = f_D lambda / 2 (pipeline.display_map, common practice)
        self.velocity_bin_mps = self.doppler_bin_hz * s.wavelength_m / 2.0
        self.hypotheses = np.asarray(pipe.mimo.hypotheses, np.int64)
        unfolds = self.hypotheses.size > 1
        self.max_range_m = float(s.max_range_m)
        self.max_velocity_mps = float(s.max_velocity_unfolded_mps if unfolds else s.max_velocity_mps)
        self.unfolding = unfolds

    def locate(self, range_m: float, velocity_mps: float) -> tuple[int, int, int]:
        """(range bin, fft-shifted Doppler column, unfolding hypothesis q) of the cell nearest the
        point (range_m, velocity_mps); CubecastError naming the value outside the coverage."""
        if not (math.isfinite(range_m) and 0.0 <= range_m <= self.max_range_m):
            raise CubecastError(f"--range-m {range_m:g}: outside the sensor's range coverage "
                                f"0..{self.max_range_m:.2f} m")
        vmax = self.max_velocity_mps
        if not (math.isfinite(velocity_mps) and abs(velocity_mps) <= vmax):
            how = "unfolded over the TDM slots" if self.unfolding else "without unfolding"
            raise CubecastError(f"--velocity-mps {velocity_mps:g}: outside the sensor's velocity coverage "
                                f"-{vmax:.2f}..+{vmax:.2f} m/s ({how})")
        r = int(round((range_m + self.range_bias_m) / self.range_bin_m))
        r = min(max(r, 0), self.n_range - 1)
        b = int(round(velocity_mps / self.velocity_bin_mps))      # unfolded Doppler bin
        q = (b + self.half) // self.n_doppler
        q = int(min(max(q, self.hypotheses.min()), self.hypotheses.max()))
        col = min(max(b - q * self.n_doppler + self.half, 0), self.n_doppler - 1)
        return r, col, q

    def range_m(self, r) -> np.ndarray:
        """Range of bin centres, with the calibration's range bias subtracted as the points have it."""
        return np.asarray(r, np.float64) * self.range_bin_m - self.range_bias_m

    def velocity_mps(self, col) -> np.ndarray:
        """Velocity before unfolding of fft-shifted Doppler columns (the map's axis)."""
        return (np.asarray(col, np.float64) - self.half) * self.velocity_bin_mps

    def detection_of_points(self, points: np.ndarray, det_range_bin: np.ndarray,
                            det_column: np.ndarray) -> np.ndarray:
        """Index of the CFAR detection each point came from: the nearest detection cell to the point's
        refined range and folded velocity, in cells (circular in Doppler). Detections are local maxima
        of the map, at least two cells apart, and refinement moves a point well under a cell from its
        detection, so the nearest one is its own. -1 when the frame has no detections."""
        if len(det_range_bin) == 0 or len(points) == 0:
            return np.full(len(points), -1, np.int64)
        rf = (points["range_m"].astype(np.float64) + self.range_bias_m) / self.range_bin_m
        cf = points["velocity_mps"].astype(np.float64) / self.velocity_bin_mps + self.half
        dr = rf[:, None] - np.asarray(det_range_bin, np.float64)[None, :]
        dc = np.mod(cf[:, None] - np.asarray(det_column, np.float64)[None, :] + self.n_doppler / 2,
                    self.n_doppler) - self.n_doppler / 2
        return np.argmin(dr ** 2 + dc ** 2, axis=1)


def _echo_half_wavelength_m(pipe: Pipeline, range_m: float) -> float:
    """Half the wavelength of the echo's mean frequency over the samples at range R (README signal
    model): c / (2 (f_c + S (adc_start_delay_s + (N - 1) / (2 fs)) - 2 S R / c))."""
    s = pipe.sensor
    mean_hz = s.start_frequency_hz + s.slope_hz_per_s * (
        s.adc_start_delay_s + (s.samples_per_chirp - 1) / (2.0 * s.sample_rate_hz))
    return SPEED_OF_LIGHT_MPS / (2.0 * (mean_hz - 2.0 * s.slope_hz_per_s * range_m / SPEED_OF_LIGHT_MPS))


def _point_dict(p) -> dict:
    return {name: _num(p[name]) for name, _ in POINT_FIELDS}


def _cfar_at(pipe: Pipeline, power: np.ndarray, r: int, col: int):
    """The CFAR's view of cell (r, col), the frame's detections and the threshold map (float64)."""
    det = pipe.cfar.detect(power, copy=True)
    threshold = pipe.cfar.threshold(power).astype(np.float64)
    factor = float(pipe.cfar.factor[r])
    statistic = threshold[r, col] / factor
    noise = statistic * float(pipe.cfar.noise_scale[r])    # mean of a noise-only cell (cfar.py)
    p = float(power[r, col])
    snr = max(p / noise - 1.0, SNR_FLOOR_LINEAR) if noise > 0 else float("inf")
    cs = pipe.cfar.settings
    r_lo = 0 if cs.range_min_bin is None else cs.range_min_bin
    r_hi = power.shape[0] if cs.range_max_bin is None else cs.range_max_bin
    detected = bool(np.any((det.range_bin == r) & (det.doppler_bin == col)))
    return {"power": p, "noise": noise, "statistic": statistic, "factor": factor, "threshold": float(threshold[r, col]),
            "snr": snr, "detected": detected, "in_range_gates": bool(r_lo <= r < r_hi)}, det, threshold


def _points_at(geo: CellGeometry, points: np.ndarray, det, r: int, col: int) -> tuple[np.ndarray, list[dict]]:
    """The points of the detection at (r, col), and those of detections in the neighbouring cells
    (each with its detection's cell and centre)."""
    owner = geo.detection_of_points(points, det.range_bin, det.doppler_bin)
    mine = np.flatnonzero((det.range_bin == r) & (det.doppler_bin == col))
    here = points[owner == mine[0]] if mine.size else points[:0]
    nearby = []
    for k in np.unique(owner[owner >= 0]):
        dr, dc = int(det.range_bin[k]) - r, (int(det.doppler_bin[k]) - col + geo.half) % geo.n_doppler - geo.half
        if (dr, dc) != (0, 0) and abs(dr) <= 1 and abs(dc) <= 1:
            folded = float(geo.velocity_mps(det.doppler_bin[k]))
            for p in points[owner == k]:
                # the detection's cell centre, unfolded as the point's velocity is
                span = geo.n_doppler * geo.velocity_bin_mps
                unfolded = folded + span * round((float(p["velocity_mps"]) - folded) / span)
                nearby.append(dict(_point_dict(p), detection_range_bin=int(det.range_bin[k]),
                                   detection_doppler_column=int(det.doppler_bin[k]),
                                   detection_range_m=float(geo.range_m(det.range_bin[k])),
                                   detection_velocity_mps=unfolded))
    return here, nearby


def _snapshot(pipe: Pipeline, r: int, col: int, doppler_hz: float) -> np.ndarray:
    """The cell's virtual snapshot complex128 [n_virt] (channel k n_rx + l), Doppler phase of each
    slot removed at doppler_hz, before calibration."""
    d = (col - pipe.doppler_fft.fft_size // 2) % pipe.doppler_fft.fft_size   # unshifted FFT index
    values = np.ascontiguousarray(pipe.doppler_fft.spectrum[:, :, r, d])[None]  # [1, rx, slot]
    snaps = pipe.mimo.snapshots(values, np.array([[doppler_hz]], np.float64))
    return snaps[0, 0].astype(np.complex128)


def angle_spectra(pipe: Pipeline, x: np.ndarray, u0: float, w0: float) -> dict:
    """Angle FFT of a calibrated snapshot x on the chain's virtual grid (cell means, the chain's
    taper, zero padded to its FFT sizes, kernel exp(+j 2 pi k n / N) as the beam sum conj(steer) x):
    along u at elevation cosine w0 and along w at azimuth cosine u0, each exact in the other
    coordinate. Power normalised by the squared taper sum: a unit plane wave gives 1 at its peak."""
    est = pipe.angle
    g = est.grid
    wx = grid_window(est.settings.window, g.n_x)
    wz = grid_window(est.settings.window, g.n_z)
    img = g.scatter_mean(x[None].astype(np.complex64))[0].astype(np.complex128) * np.outer(wz, wx)
    norm = float(np.sum(np.outer(wz, wx)[g.cells[:, 0], g.cells[:, 1]])) ** 2
    k0p = 2.0 * np.pi * g.pitch_m / g.wavelength_m
    nx, nz = est.n_fft_x, est.n_fft_z
    rows = np.fft.ifft(img, n=nx, axis=1) * nx                             # [n_z, n_fft_x]
    beam_u = (np.exp(1j * k0p * w0 * np.arange(g.n_z)) @ rows)
    cols = np.fft.ifft(img, n=nz, axis=0) * nz                             # [n_fft_z, n_x]
    beam_w = cols @ np.exp(1j * k0p * u0 * np.arange(g.n_x))
    u = bin_direction_cosines(nx, g.wavelength_m, g.pitch_m)
    w = bin_direction_cosines(nz, g.wavelength_m, g.pitch_m)
    out = {}
    for name, cos, other, beam in (("azimuth", u, w0, beam_u), ("elevation", w, u0, beam_w)):
        keep = cos ** 2 + other ** 2 <= 1.0 + 1e-12                        # visible directions
        c = cos[keep]
        if name == "azimuth":
            ang = np.degrees(np.arctan2(c, np.sqrt(np.maximum(0.0, 1.0 - c ** 2 - other ** 2))))
        else:
            ang = np.degrees(np.arcsin(np.clip(c, -1.0, 1.0)))
        order = np.argsort(ang)
        out[name] = (ang[order], (np.abs(beam[keep]) ** 2 / norm)[order])
    return out


def _estimate(pipe: Pipeline, x: np.ndarray, here: np.ndarray, noise_virtual: float) -> dict:
    """Direction of the cell: the chain's strongest point in the cell, or the angle estimator on this
    snapshot with its Cramér-Rao sigmas (Stoica and Nehorai 1989, chain/bounds.py)."""
    if len(here):
        p = here[int(np.argmax(here["snr_db"]))]
        return {"source": "point", "azimuth_deg": float(p["azimuth_deg"]), "elevation_deg": float(p["elevation_deg"]),
                "sigma_azimuth_deg": float(p["sigma_azimuth_deg"]),
                "sigma_elevation_deg": float(p["sigma_elevation_deg"])}
    res = pipe.angle.estimate(x[None].astype(np.complex64))
    if len(res) == 0:
        return {"source": "none", "azimuth_deg": 0.0, "elevation_deg": 0.0, "sigma_azimuth_deg": float("inf"),
                "sigma_elevation_deg": float("inf")}
    az, el = float(res.azimuth_deg[0]), float(res.elevation_deg[0])
    n_virt = x.size
    # peak_power: n_virt |a|^2 + sigma^2 for one plane wave in white noise (angle.AngleResult)
    snr = max((float(res.peak_power[0]) - noise_virtual) / (n_virt * noise_virtual), SNR_FLOOR_LINEAR)
    pos, lam = pipe.virtual_positions_m, pipe.sensor.wavelength_m
    return {"source": "cell snapshot", "azimuth_deg": az, "elevation_deg": el,
            "sigma_azimuth_deg": float(sigma_azimuth_deg(pos, lam, snr, az, el)),
            "sigma_elevation_deg": float(sigma_elevation_deg(pos, lam, snr, az, el))}


def inspect_cell(pipe: Pipeline, frame: np.ndarray, range_m: float, velocity_mps: float) -> dict:
    """Process one canonical frame and look at the cell nearest (range_m, velocity_mps): see the
    module docstring. Raises CubecastError for a range or velocity outside the sensor's coverage."""
    geo = CellGeometry(pipe)
    r, col, q = geo.locate(float(range_m), float(velocity_mps))
    points = pipe.process(frame)
    power = pipe.detection_map.copy()
    cf, det, threshold = _cfar_at(pipe, power, r, col)
    here, nearby = _points_at(geo, points, det, r, col)
    median = max(float(np.median(power)), TINY)    # 0 dB of the dB figures (a frame of zeros: TINY)
    n_dop = geo.n_doppler
    unfolded_bin = col - geo.half + q * n_dop
    if len(here):
        p = here[int(np.argmax(here["snr_db"]))]
        doppler_hz = float(p["velocity_mps"]) / _echo_half_wavelength_m(pipe, float(p["range_m"]))
        phase_from = "the chain's point in the cell"
    else:
        doppler_hz = unfolded_bin * geo.doppler_bin_hz
        phase_from = "the cell centre, unfolded as the asked velocity says"
    raw = _snapshot(pipe, r, col, doppler_hz)
    cal = pipe.angle.calibration.astype(np.complex128)
    x = raw * cal
    # per-channel noise: the CFAR's noise of a map cell is K times one slot value's (cfar.py); a decoded
    # virtual channel has 1 / virtual_snr_factor of it (mimo.py), scaled by its calibration factor
    noise_slot = cf["noise"] / pipe.cfar.n_integrated
    noise_virtual = max(noise_slot / pipe.mimo.virtual_snr_factor(), TINY)
    est = _estimate(pipe, raw, here, noise_virtual)
    az, el = math.radians(est["azimuth_deg"]), math.radians(est["elevation_deg"])
    spectra = angle_spectra(pipe, x, math.sin(az) * math.cos(el), math.sin(el))
    n_rx = pipe.sensor.n_rx
    v_idx = np.arange(x.size)
    pos = pipe.virtual_positions_m
    channel_noise = noise_virtual * np.abs(cal) ** 2
    return {
        "sensor_id": pipe.sensor.sensor_id,
        "requested": {"range_m": float(range_m), "velocity_mps": float(velocity_mps)},
        "cell": {
            "range_bin": r, "doppler_column": col, "doppler_bin": col - geo.half, "unfolding_hypothesis": q,
            "range_m": float(geo.range_m(r)), "velocity_mps": float(geo.velocity_mps(col)),
            "velocity_unfolded_mps": unfolded_bin * geo.velocity_bin_mps,
            "range_bin_m": geo.range_bin_m, "velocity_bin_mps": geo.velocity_bin_mps,
            "power_db": float(_db(cf["power"] / median)), "noise_db": float(_db(cf["noise"] / median)),
            "threshold_db": float(_db(cf["threshold"] / median)), "snr_db": _num(_db(cf["snr"])),
            "threshold_over_noise_db": float(_db(cf["threshold"] / max(cf["noise"], TINY))),
            "threshold_factor": cf["factor"], "noise_statistic": cf["statistic"], "noise": cf["noise"],
            "map_median": median, "cfar_kind": pipe.cfar.settings.kind,
            "above_threshold": cf["power"] > cf["threshold"], "detected": cf["detected"],
            "in_range_gates": cf["in_range_gates"],
        },
        "frame_detections": len(det), "frame_points": int(len(points)),
        "points": [_point_dict(p) for p in here], "nearby_points": nearby,
        "range_profile": {"range_m": _nums(geo.range_m(np.arange(geo.n_range))),
                          "power_db": _nums(_db(power[:, col] / median)),
                          "threshold_db": _nums(_db(threshold[:, col] / median))},
        "doppler_spectrum": {"velocity_mps": _nums(geo.velocity_mps(np.arange(n_dop))),
                             "power_db": _nums(_db(power[r, :] / median)),
                             "threshold_db": _nums(_db(threshold[r, :] / median))},
        "snapshot": {"doppler_hz": doppler_hz, "doppler_phase_from": phase_from,
                     "calibrated": bool(np.any(cal != 1))},
        "channels": {"index": v_idx.tolist(), "tx": (v_idx // n_rx).tolist(), "rx": (v_idx % n_rx).tolist(),
                     "x_m": _nums(pos[:, 0]), "z_m": _nums(pos[:, 2]),
                     "amplitude_db": _nums(_db(np.abs(x) ** 2 / channel_noise)),
                     "phase_deg": _nums(np.degrees(np.angle(x)))},
        "angle": {"estimate": {k: (_num(v) if isinstance(v, float) else v) for k, v in est.items()},
                  "azimuth": {"azimuth_deg": _nums(spectra["azimuth"][0]),
                              "power_db": _nums(_db(spectra["azimuth"][1] / noise_virtual)),
                              "through_elevation_deg": est["elevation_deg"]},
                  "elevation": {"elevation_deg": _nums(spectra["elevation"][0]),
                                "power_db": _nums(_db(spectra["elevation"][1] / noise_virtual)),
                                "through_azimuth_deg": est["azimuth_deg"]},
                  "wavelength_m": pipe.sensor.wavelength_m},
    }


def _pm(value, sigma, unit: str, digits: int) -> str:
    """'value ± sigma unit' (sigma to two significant figures), or 'value unit' without a sigma."""
    s = f"{value:.{digits}f}"
    return s + (f" ± {sigma:.2g} {unit}" if sigma is not None else f" {unit}")


def format_inspection(result: dict) -> str:
    """The inspection as a few lines of text (what `cubecast inspect` prints without --json)."""
    c, est = result["cell"], result["angle"]["estimate"]
    head = [f"{k} {result[k]}" for k in ("capture", "frame", "sequence") if k in result]
    lines = ["  ".join(head)] if head else []
    lines += [
        f"cell          range bin {c['range_bin']} ({c['range_m']:.3f} m, bin {c['range_bin_m']:.4f} m), Doppler bin "
        f"{c['doppler_bin']} ({c['velocity_mps']:+.3f} m/s before unfolding, {c['velocity_unfolded_mps']:+.3f} m/s "
        f"unfolded, bin {c['velocity_bin_mps']:.4f} m/s)",
        f"map           {c['power_db']:.1f} dB over the map's median; CFAR ({c['cfar_kind']}) noise {c['noise_db']:.1f} dB, "
        f"threshold {c['threshold_db']:.1f} dB ({c['threshold_over_noise_db']:.1f} dB over the noise)",
        ("SNR           – (no noise in the training cells); " if c["snr_db"] is None else
         f"SNR           {c['snr_db']:.1f} dB per channel; ")
        + ("above the threshold" if c["above_threshold"] else "below the threshold")
        + ("; detected" if c["detected"] else "; not detected")
        + ("" if c["in_range_gates"] else " (outside the range gates)"),
        ("direction     none: the angle estimator finds no peak in this cell's snapshot" if est["source"] == "none"
         else f"direction     azimuth {_pm(est['azimuth_deg'], est['sigma_azimuth_deg'], 'deg', 2)}, elevation "
              f"{_pm(est['elevation_deg'], est['sigma_elevation_deg'], 'deg', 2)} (from the {est['source']}; "
              f"± 1 sigma)"),
    ]
    for p in result["points"]:
        lines.append(f"point         range {_pm(p['range_m'], p['sigma_range_m'], 'm', 3)}, velocity "
                     f"{_pm(p['velocity_mps'], p['sigma_velocity_mps'], 'm/s', 3)}, azimuth "
                     f"{_pm(p['azimuth_deg'], p['sigma_azimuth_deg'], 'deg', 2)}, elevation "
                     f"{_pm(p['elevation_deg'], p['sigma_elevation_deg'], 'deg', 2)}, SNR {p['snr_db']:.1f} dB")
    if not result["points"]:
        lines.append("point         none of the chain's points comes from this cell")
    for p in result["nearby_points"]:
        lines.append(f"nearby point  range {p['range_m']:.3f} m, velocity {p['velocity_mps']:+.3f} m/s, azimuth "
                     f"{p['azimuth_deg']:.2f} deg: detected in the neighbouring cell --range-m "
                     f"{p['detection_range_m']:.3f} --velocity-mps {p['detection_velocity_mps']:+.3f}")
    return "\n".join(lines)
