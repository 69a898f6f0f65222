"""The processing chain: one canonical frame in, one point cloud out.

    frame complex64 [chirp, rx, sample]
      -> RangeFft      complex64 [slot, range, loop] per RX  (regroup by slot, windows, zero padding,
                                                              FFT written transposed)
      -> DopplerFft    complex64 [rx, slot, range, doppler]  (FFT over contiguous loops)
                       float32   [range, doppler]            (non-coherent detection map)
      -> Cfar          detections (range bin, Doppler column, SNR)
      -> refinement    fractional range and Doppler bins (log-parabolic interpolation of the map)
      -> MimoDecoder   virtual snapshots with Doppler-induced phase compensation and velocity unfolding
      -> AngleEstimator azimuth / elevation peaks per detection
      -> points        POINT_DTYPE records with Cramér-Rao standard deviations

The Pipeline owns every buffer it writes; `process` returns a fresh array the caller may keep.
It is pure: the same sensor, settings, calibration and frame always give the same points.
"""

from __future__ import annotations

import time

import numpy as np

from ..errors import CubecastError
from ..sensor import Sensor
from ..settings import ProcessingSettings
from .angle import AngleEstimator, AngleSettings, VirtualGrid, sigma_azimuth_deg, sigma_elevation_deg
from .cfar import Cfar, CfarSettings
from .doppler import DopplerFft
from .mimo import MimoDecoder
from .points import POINT_DTYPE, tone_crb_bins
from .rangefft import RangeFft

STAGES = ("range_fft", "doppler_fft", "cfar", "mimo", "angle", "points")


def _interp_log_parabola(lo: np.ndarray, mid: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Fractional peak offset in (-0.5, 0.5) from three power samples, fitting a parabola to their
    logarithms (Gaussian interpolation; common practice for windowed spectra)."""
    eps = np.float32(1e-30)
    a, b, c = np.log(lo + eps), np.log(mid + eps), np.log(hi + eps)
    den = a - 2.0 * b + c
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.where(den < 0, 0.5 * (a - c) / den, 0.0)
    return np.clip(d, -0.5, 0.5)


def _next_pow2(n: int) -> int:
    return 1 << max(0, int(n - 1).bit_length())


class Pipeline:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings | None = None,
                 calibration: np.ndarray | None = None, range_bias_m: float = 0.0):
        """`calibration`: complex per-virtual-channel factors applied before angle estimation;
        `range_bias_m`: measured minus true range of a reference target, subtracted from every point
        (both from `cubecast calibrate`)."""
        self.sensor = sensor
        self.settings = settings = (settings or ProcessingSettings()).validate()
        self.frame_shape = (sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        self.range_fft = RangeFft(sensor, settings)
        n_range = self.range_fft.n_bins
        self.doppler_fft = DopplerFft(sensor, settings, self.range_fft.fft_size, n_range,
                                      sensor.samples_per_chirp)
        n_dop = self.doppler_fft.fft_size

        max_range = settings.max_range_m or sensor.max_range_m
        if settings.max_range_m > sensor.max_range_m:
            raise CubecastError(f"[processing] max_range_m = {settings.max_range_m}: beyond the sensor's "
                                f"maximum range {sensor.max_range_m:.2f} m")
        bin_m = self.range_fft.bin_m
        r_lo = int(np.ceil(settings.min_range_m / bin_m))
        r_hi = min(n_range, int(np.floor(max_range / bin_m)) + 1)
        if r_lo >= r_hi:
            raise CubecastError(f"[processing] min_range_m = {settings.min_range_m}: leaves no range bins")
        try:
            cfar_settings = CfarSettings(
                kind=settings.cfar_kind, train_range=settings.cfar_train_range,
                guard_range=settings.cfar_guard_range, train_doppler=settings.cfar_train_doppler,
                guard_doppler=settings.cfar_guard_doppler, pfa=settings.cfar_pfa,
                os_rank_fraction=settings.cfar_os_rank_fraction, range_min_bin=r_lo, range_max_bin=r_hi)
            self.cfar = Cfar(cfar_settings, n_range, n_dop, self.doppler_fft.n_channels)
        except CubecastError as exc:
            raise CubecastError(f"[processing] CFAR settings: {exc}") from None

        self.mimo = MimoDecoder(sensor, settings, self.doppler_fft.bin_hz, n_dop)
        self.virtual_positions_m = sensor.virtual_positions_m
        grid = VirtualGrid.from_positions(self.virtual_positions_m, sensor.wavelength_m)
        n_az = settings.angle_fft_size_azimuth or max(64, _next_pow2(2 * grid.n_x))
        n_el = (settings.angle_fft_size_elevation or max(16, _next_pow2(4 * grid.n_z))) if grid.n_z > 1 else 1
        for name, size, cells in (("angle_fft_size_azimuth", n_az, grid.n_x),
                                  ("angle_fft_size_elevation", n_el, grid.n_z if grid.n_z > 1 else 1)):
            if size < cells:
                raise CubecastError(f"[processing] {name} = {size}: smaller than the virtual array's {cells} "
                                    f"grid positions on that axis (use 0 for automatic)")
        self.angle = AngleEstimator(
            grid,
            AngleSettings(fft_size_azimuth=n_az, fft_size_elevation=n_el,
                          peak_threshold_db=settings.angle_peak_threshold_db,
                          max_peaks=settings.angle_max_peaks),
            calibration)
        self.n_virtual = sensor.n_virtual
        self.range_resolution_m = sensor.range_resolution_m
        self.velocity_resolution_mps = sensor.velocity_resolution_mps
        self.half_wavelength_m = sensor.wavelength_m / 2.0
        self.stage_ms = dict.fromkeys(STAGES, 0.0)
        self._canonical = None
        self.range_bias_m = float(range_bias_m)
        self.last_detections = 0

    @property
    def detection_map(self) -> np.ndarray:
        """The last frame's range-Doppler map (float32 [range, doppler], Doppler fft-shifted)."""
        return self.doppler_fft.power

    def process(self, frame: np.ndarray) -> np.ndarray:
        """Points of one canonical frame (complex64 [chirp, rx, sample])."""
        if frame.shape != self.frame_shape or frame.dtype != np.complex64:
            raise CubecastError(f"frame has shape {frame.shape} dtype {frame.dtype}; the chain expects "
                                f"complex64 {self.frame_shape} for sensor '{self.sensor.sensor_id}'")
        return self._process(frame, self.range_fft.load)

    def process_raw(self, raw: np.ndarray) -> np.ndarray:
        """Points of one frame in the sensor's ADC format (as a board or capture delivers it). Int16
        I/Q is converted on the fly inside the range stage; other formats go through the canonical
        frame."""
        shape = self.sensor.adc.raw_shape(*self.frame_shape)
        if raw.shape != shape or raw.dtype != self.sensor.adc.raw_dtype():
            raise CubecastError(f"frame has shape {raw.shape} dtype {raw.dtype}; sensor "
                                f"'{self.sensor.sensor_id}' delivers {self.sensor.adc.raw_dtype()} {shape}")
        if self.range_fft.raw_iq16:
            return self._process(raw, self.range_fft.load_raw)
        if self._canonical is None:
            self._canonical = np.empty(self.frame_shape, np.complex64)
        return self.process(self.sensor.raw_to_canonical(raw, self._canonical))

    def _process(self, data: np.ndarray, load) -> np.ndarray:
        t0 = time.perf_counter()
        t_range = 0.0
        rng, dop = self.range_fft, self.doppler_fft
        dop.begin()
        window_d = dop.window
        for rx in range(self.sensor.n_rx):
            ta = time.perf_counter()
            block = dop.block(rx)
            load(data, rx, window_d)  # counted with the range stage
            rng.transform(block)
            t_range += time.perf_counter() - ta
            dop.transform(block)
            dop.accumulate(block)
        spec, power = dop.spectrum, dop.power
        t2 = time.perf_counter()
        t1 = t0 + t_range
        det = self.cfar.detect(power)
        t3 = time.perf_counter()
        n_det = len(det)
        self.last_detections = n_det
        if n_det == 0:
            self._times(t0, t1, t2, t3, t3, t3, t3)
            return np.empty(0, POINT_DTYPE)
        if n_det > self.settings.max_points:  # strongest first
            keep = np.sort(np.argsort(det.power)[::-1][: self.settings.max_points])
            r, d, snr = det.range_bin[keep], det.doppler_bin[keep], det.snr_linear[keep]
        else:
            r, d, snr = det.range_bin, det.doppler_bin, det.snr_linear

        n_range, n_dop = power.shape
        rp = np.clip(r + 1, 0, n_range - 1)
        rm = np.clip(r - 1, 0, n_range - 1)
        dr = _interp_log_parabola(power[rm, d], power[r, d], power[rp, d])
        dr = np.where((r == 0) | (r == n_range - 1), 0.0, dr)
        dd = _interp_log_parabola(power[r, (d - 1) % n_dop], power[r, d], power[r, (d + 1) % n_dop])
        d_fft = (d - n_dop // 2) % n_dop
        slot_values = spec[:, :, r, d_fft].transpose(2, 1, 0)  # [n_det, n_slots, n_rx]
        snaps, doppler_hz = self.mimo.resolve(slot_values, d + dd, self.angle.coherence)
        t4 = time.perf_counter()

        ang = self.angle.estimate(snaps)
        t5 = time.perf_counter()

        i = ang.det_index
        n = i.shape[0]
        out = np.empty(n, POINT_DTYPE)
        # a secondary angle peak gets the share of the cell's SNR its beam power holds
        first = np.zeros(len(r), np.float64)
        np.maximum.at(first, i, ang.peak_power)
        snr_pt = snr[i] * (ang.peak_power / np.maximum(first[i], 1e-30))
        range_m = ((r[i] + dr[i]) * self.range_fft.bin_m - self.range_bias_m).astype(np.float32)
        az = np.radians(ang.azimuth_deg.astype(np.float64))
        el = np.radians(ang.elevation_deg.astype(np.float64))
        out["range_m"] = range_m
        out["azimuth_deg"] = ang.azimuth_deg
        out["elevation_deg"] = ang.elevation_deg
        out["x_m"] = range_m * np.cos(el) * np.sin(az)
        out["y_m"] = range_m * np.cos(el) * np.cos(az)
        out["z_m"] = range_m * np.sin(el)
        out["velocity_mps"] = doppler_hz[i] * self.half_wavelength_m
        out["snr_db"] = 10.0 * np.log10(np.maximum(snr_pt, 1e-12))
        out["sigma_range_m"] = tone_crb_bins(snr_pt, self.n_virtual, self.sensor.samples_per_chirp) \
            * self.range_resolution_m
        out["sigma_velocity_mps"] = tone_crb_bins(snr_pt, self.n_virtual, self.sensor.n_loops) \
            * self.velocity_resolution_mps
        pos, lam = self.virtual_positions_m, self.sensor.wavelength_m
        out["sigma_azimuth_deg"] = sigma_azimuth_deg(pos, lam, snr_pt, ang.azimuth_deg, ang.elevation_deg)
        out["sigma_elevation_deg"] = sigma_elevation_deg(pos, lam, snr_pt, ang.azimuth_deg, ang.elevation_deg)
        t6 = time.perf_counter()
        self._times(t0, t1, t2, t3, t4, t5, t6)
        return out

    def _times(self, *t: float) -> None:
        for k, name in enumerate(STAGES):
            self.stage_ms[name] = (t[k + 1] - t[k]) * 1e3

