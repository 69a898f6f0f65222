"""The processing chain: one canonical frame in, one point cloud out.

    frame complex64 [chirp, rx, sample]
      -> RangeFft      complex64 [slot, range, loop] per RX  (regroup by slot, windows, zero padding,
                                                              FFT written transposed)
      -> DopplerFft    complex64 [rx, slot, range, doppler]  (FFT over contiguous loops)
                       float32   [range, doppler]            (non-coherent detection map)
      -> Cfar          detections (range bin, Doppler column, SNR)
      -> Refiner       range and Doppler frequency refined on each detection's own samples, and the
                       slot values there (refine.py), started at the map's log-parabolic interpolation
      -> MimoDecoder   virtual snapshots with Doppler-induced phase compensation and velocity unfolding
      -> AngleEstimator azimuth / elevation peaks per detection
      -> points        POINT_DTYPE records with their standard deviations

The Pipeline owns every buffer it writes; `process` returns a fresh array the caller may keep.
It is pure: the same sensor, settings, calibration and frame always give the same points.
"""

from __future__ import annotations

import time

import numba
import numpy as np

from ..errors import CubecastError
from ..sensor import SPEED_OF_LIGHT_MPS, Sensor
from ..settings import ProcessingSettings
from .angle import AngleEstimator, AngleSettings, VirtualGrid, crb_unit_covariance
from .cfar import Cfar, CfarSettings
from .doppler import DopplerFft
from .frontend import FrontEnd
from .mimo import MimoDecoder
from .points import POINT_DTYPE, POINT_FIELDS, fill_points
from .rangefft import RangeFft
from .rdmap import pool_rdmap
from .refine import Refiner

STAGES = ("range_fft", "doppler_fft", "cfar", "mimo", "angle", "points")


@numba.njit(cache=True, nogil=True)
def log_parabola_offset(lo, mid, hi):
    """Fractional peak offset in [-0.5, 0.5] from three power samples, fitting a parabola to their
    logarithms (Gaussian interpolation; common practice for windowed spectra). float32."""
    eps = np.float32(1e-30)
    a = np.float32(np.log(lo + eps))
    b = np.float32(np.log(mid + eps))
    c = np.float32(np.log(hi + eps))
    den = a - np.float32(2.0) * b + c
    if not (den < 0):
        return np.float32(0.0)
    d = np.float32(0.5) * (a - c) / den
    return min(max(d, np.float32(-0.5)), np.float32(0.5))


@numba.njit(cache=True, nogil=True)
def _start_offsets(power, range_bin, doppler_col, range_frac, doppler_frac):
    """Per detection: fractional range and Doppler offsets by log-parabolic interpolation of the
    map (none at the first and last range bin; circular in Doppler), where the refinement starts."""
    n_range, n_dop = power.shape
    for i in range(range_bin.shape[0]):
        r, d = range_bin[i], doppler_col[i]
        p = power[r, d]
        if r == 0 or r == n_range - 1:
            range_frac[i] = 0.0
        else:
            range_frac[i] = log_parabola_offset(power[r - 1, d], p, power[r + 1, d])
        doppler_frac[i] = log_parabola_offset(power[r, (d - 1) % n_dop], p, power[r, (d + 1) % n_dop])


def _checked_iq_imbalance(sensor: Sensor, iq_imbalance) -> np.ndarray | None:
    """The I/Q correction as float64 [n_rx, 2] (g, phi_rad), checked: g > 0, |phi| < 90 degrees, finite;
    a real-sampled sensor has no Q branch to correct."""
    if iq_imbalance is None:
        return None
    a = np.array(iq_imbalance, np.float64)
    if a.shape != (sensor.n_rx, 2):
        raise CubecastError(f"I/Q imbalance has shape {a.shape}: sensor '{sensor.sensor_id}' needs [{sensor.n_rx}, 2] "
                            f"(gain, phase in radians per RX)")
    if not np.all(np.isfinite(a)) or np.any(a[:, 0] <= 0) or np.any(np.abs(a[:, 1]) >= np.pi / 2):
        raise CubecastError(f"I/Q imbalance {a.tolist()}: every gain must be > 0 and every phase within "
                            f"(-pi/2, pi/2) radians")
    if not sensor.adc.is_complex and np.any(a != [1.0, 0.0]):
        raise CubecastError(f"I/Q imbalance {a.tolist()}: sensor '{sensor.sensor_id}' samples real (no Q branch)")
    return a


def _next_pow2(n: int) -> int:
    return 1 << max(0, int(n - 1).bit_length())


class Pipeline:
    def __init__(self, sensor: Sensor, settings: ProcessingSettings | None = None,
                 calibration: np.ndarray | None = None, range_bias_m: float = 0.0,
                 iq_imbalance: np.ndarray | None = None):
        """`calibration`: complex per-virtual-channel factors applied before angle estimation;
        `range_bias_m`: measured minus true range of a reference target, subtracted from every point;
        `iq_imbalance`: float64 [n_rx, 2], each receive channel's Q-branch gain g and phase error phi
        (radians) to correct (README "I/Q imbalance"), or None (all from `cubecast calibrate`)."""
        self.sensor = sensor
        self.settings = settings = (settings or ProcessingSettings()).validate()
        self.frame_shape = (sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        self.range_fft = RangeFft(sensor, settings)
        n_range = self.range_fft.n_bins
        self.doppler_fft = DopplerFft(sensor, settings, self.range_fft.fft_size, n_range)
        n_dop = self.doppler_fft.fft_size
        # per receive channel: its block of the spectrum and the views the two FFTs write
        self._blocks = []
        for rx in range(sensor.n_rx):
            b = self.doppler_fft.block(rx)
            self._blocks.append((rx, b, self.range_fft.output_view(b), self.doppler_fft.rows(b)))

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

        self.refiner = Refiner(self.range_fft.window, self.range_fft.fft_size, n_range, self.doppler_fft.window,
                               n_dop, sensor.n_rx, sensor.n_slots)
        self.mimo = MimoDecoder(sensor, settings, self.doppler_fft.bin_hz, n_dop)
        self._virtual_snr = self.mimo.virtual_snr_factor()
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
                          max_peaks=settings.angle_max_peaks,
                          split_false_alarm=settings.angle_split_false_alarm,
                          model_error_db=settings.angle_model_error_db,
                          method=settings.angle_method),
            calibration)
        self.n_virtual = sensor.n_virtual
        self.range_resolution_m = sensor.range_resolution_m
        self.velocity_resolution_mps = sensor.velocity_resolution_mps
        self.half_wavelength_m = sensor.wavelength_m / 2.0
        sn = sensor
        f0, fs = sn.start_frequency_hz, sn.sample_rate_hz   # f0 = f_c, the first frequency of the ramp
        self._mean_sweep_hz = f0 + sensor.slope_hz_per_s * (
            sensor.adc_start_delay_s + (sensor.samples_per_chirp - 1) / (2.0 * fs))
        self._slope_hz_per_m = 2.0 * sensor.slope_hz_per_s / SPEED_OF_LIGHT_MPS   # S tau per metre of range
        self._crb_unit = crb_unit_covariance(self.virtual_positions_m, sensor.wavelength_m)
        # ranges are measured from the virtual array's phase centre, mean(tx_k + rx_l) / 2
        self._phase_centre_m = np.ascontiguousarray(self.virtual_positions_m.mean(axis=0) / 2.0, np.float64)
        self._pose_rotation = np.ascontiguousarray(sensor.pose_rotation, np.float64)
        self._pose_position_m = np.ascontiguousarray(sensor.pose_position_m, np.float64)
        self.stage_ms = dict.fromkeys(STAGES, 0.0)
        self._canonical = None
        self.range_bias_m = float(range_bias_m)
        self.last_detections = 0
        self.iq_imbalance = _checked_iq_imbalance(sensor, iq_imbalance)
        self.front_end = FrontEnd(sensor, settings, self.range_fft.window, self.doppler_fft.window, n_range,
                                  self.range_fft.bin_m, n_dop, self.iq_imbalance)
        # the front end's monitors of the last frame, one FRONTEND_DTYPE record per receive channel
        self.frontend = self.front_end.record

    @property
    def detection_map(self) -> np.ndarray:
        """The last frame's range-Doppler map (float32 [range, doppler], Doppler fft-shifted)."""
        return self.doppler_fft.power

    def display_map(self) -> tuple[np.ndarray, float, float, float, float]:
        """The last frame's map pooled for display (rdmap.pool_rdmap), velocity bins by v = f_D
        lambda / 2 (common practice)."""
        bin_v = self.doppler_fft.bin_hz * self.sensor.wavelength_m / 2.0
        return pool_rdmap(self.detection_map, self.range_fft.bin_m, bin_v)

    def warm_up(self) -> None:
        """Run every compiled path once: canonical frames (zeros, then a tone in noise so that the
        per-detection stages run) and the sensor's ADC format both from a writable buffer (a frame
        received over ZeroMQ is writable) and from a read-only one (bytes; numba compiles read-only
        arrays separately). serve runs it before it subscribes and before it starts workers, so that
        the numba cache is filled once and nothing compiles at the first real frame."""
        self.process(np.zeros(self.frame_shape, np.complex64))
        rng = np.random.default_rng(0)
        noise = rng.standard_normal(self.frame_shape) + 1j * rng.standard_normal(self.frame_shape)
        tone = 50.0 * np.exp(2j * np.pi * 0.23 * np.arange(self.frame_shape[2]))
        self.process((noise + tone).astype(np.complex64))
        raw_dtype = self.sensor.adc.raw_dtype()
        raw_shape = self.sensor.adc.raw_shape(*self.frame_shape)
        self.process_raw(np.zeros(raw_shape, raw_dtype))
        raw = np.frombuffer(bytes(int(np.prod(raw_shape)) * raw_dtype.itemsize), raw_dtype).reshape(raw_shape)
        self.process_raw(raw)

    def process(self, frame: np.ndarray) -> np.ndarray:
        """Points of one canonical frame (complex64 [chirp, rx, sample])."""
        if frame.shape != self.frame_shape or frame.dtype != np.complex64:
            raise CubecastError(f"frame has shape {frame.shape} dtype {frame.dtype}; the chain expects "
                                f"complex64 {self.frame_shape} for sensor '{self.sensor.sensor_id}'")
        return self._process(frame, False)

    def process_raw(self, raw: np.ndarray) -> np.ndarray:
        """Points of one frame in the sensor's ADC format (as a board or capture delivers it). Int16
        I/Q is converted on the fly inside the range stage; other formats go through the canonical
        frame."""
        shape = self.sensor.adc.raw_shape(*self.frame_shape)
        if raw.shape != shape or raw.dtype != self.sensor.adc.raw_dtype():
            raise CubecastError(f"frame has shape {raw.shape} dtype {raw.dtype}; sensor "
                                f"'{self.sensor.sensor_id}' delivers {self.sensor.adc.raw_dtype()} {shape}")
        if self.range_fft.raw_iq16:
            return self._process(raw, True)
        if self._canonical is None:
            self._canonical = np.empty(self.frame_shape, np.complex64)
        return self.process(self.sensor.raw_to_canonical(raw, self._canonical))

    def _process(self, data: np.ndarray, raw: bool) -> np.ndarray:
        t0 = time.perf_counter()
        t_range = 0.0
        rng, dop = self.range_fft, self.doppler_fft
        dop.begin()
        window_d = dop.window
        source = rng.source(data, raw)
        front = self.front_end
        for rx, block, range_out, doppler_rows in self._blocks:
            ta = time.perf_counter()
            rng.load(source, rx, window_d, front)  # counted with the range stage
            rng.transform(range_out)
            t_range += time.perf_counter() - ta
            dop.transform(doppler_rows)
            front.after_doppler(doppler_rows, rx)  # leakage region
            dop.accumulate(rx, front.noise_cells)
            front.after_accumulate(rx)  # noise floor
        spec, power = dop.spectrum, dop.power
        t2 = time.perf_counter()
        t1 = t0 + t_range
        det = self.cfar.detect(power, copy=False)  # used before the next frame's detection
        t3 = time.perf_counter()
        n_det = len(det)
        self.last_detections = n_det
        if n_det == 0:
            self._times(t0, t1, t2, t3, t3, t3, t3)
            return np.empty(0, POINT_DTYPE)
        if n_det > self.settings.max_points:  # strongest first
            keep = np.sort(np.argsort(det.power)[::-1][: self.settings.max_points])
            r, d, snr, noise = det.range_bin[keep], det.doppler_bin[keep], det.snr_linear[keep], det.noise[keep]
        else:
            r, d, snr, noise = det.range_bin, det.doppler_bin, det.snr_linear, det.noise

        n = len(r)
        dr, dd = np.empty(n, np.float32), np.empty(n, np.float32)
        _start_offsets(power, r, d, dr, dd)
        ref = self.refiner.refine(spec, power, r, d, dr, dd, noise, snr)
        snaps, doppler_hz = self.mimo.resolve(ref.values, ref.doppler_bin + dop.fft_size // 2, self.angle.coherence)
        t4 = time.perf_counter()

        ang = self.angle.estimate(snaps)
        t5 = time.perf_counter()

        out = np.empty(ang.det_index.shape[0], POINT_DTYPE)
        # The echo's mean frequency over the samples: the beat phase f_c tau + S tau t_n - S tau^2 / 2
        # (README's signal model) advances with tau at f_c + S t_n - S tau, averaged over t_n.
        range_m = ref.range_bin * self.range_fft.bin_m
        half_wl = SPEED_OF_LIGHT_MPS / (2.0 * (self._mean_sweep_hz - self._slope_hz_per_m * range_m))
        bin_v = dop.bin_hz * half_wl
        fill_points(ref.range_bin, self.range_fft.bin_m, self.range_bias_m, ang.det_index, ang.azimuth_deg,
                    ang.elevation_deg, ang.snr_share, doppler_hz, half_wl, snr,
                    ref.value_snr * self._virtual_snr, ref.sigma_range_bins * self.range_fft.bin_m,
                    ref.sigma_doppler_bins * bin_v, self._phase_centre_m, ang.crb_unit, *self._crb_unit[3:],
                    self._pose_rotation, self._pose_position_m, out.view(np.float32).reshape(-1, len(POINT_FIELDS)))
        t6 = time.perf_counter()
        self._times(t0, t1, t2, t3, t4, t5, t6)
        return out

    def _times(self, *t: float) -> None:
        for k, name in enumerate(STAGES):
            self.stage_ms[name] = (t[k + 1] - t[k]) * 1e3

