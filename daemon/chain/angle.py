"""Angle estimation over a MIMO virtual array: AngleEstimator composes the stages below.

Signal convention (fixed for the whole project). A far-field target in unit direction
k = (x, y, z) / r of the sensor frame (x right, y boresight, z up) gives virtual channel i,
whose position p_i (metres) is the sum of its TX and RX positions, the snapshot value

    s_i = a * exp(-j * 2*pi/lambda * (k . p_i))   (+ noise).

The array lies in the x-z plane (y ~ 0), so only the direction cosines

    u = x / r = sin(az) * cos(el)        w = z / r = sin(el)

are observable, and

    azimuth_deg   = degrees(atan2(u, sqrt(1 - u^2 - w^2)))    positive right
    elevation_deg = degrees(asin(w))                          positive up.

Beam (matched filter) at (u, w): B(u, w) = sum_i conj(steer_i(u, w)) * s_i with
steer_i(u, w) = exp(-j * 2*pi/lambda * (u * x_i + w * z_i)).

Processing per call of AngleEstimator.estimate() (each module's docstring gives the details):

1. Calibrate: multiply channel i by calibration[i].
2. Grid (virtual_grid.py): every channel belongs to one (iz, ix) cell of a regular grid;
   redundant channels in one cell are averaged; the (optionally windowed) cell image is
   zero-padded to fft_size_elevation x fft_size_azimuth.
3. 2D zero-padded transform (angle_peaks.py): a batched FFT along x, a small DFT matrix along z.
4. Peaks (angle_peaks.py): visible local maxima of the beam power at or above
   `peak_threshold_db` of the snapshot's strongest, at most `max_peaks`, strongest first: the
   candidate targets (with refine = False, the result).
5. Refinement (angle_refine.py): Newton iterations on the beam power over the ACTUAL element
   positions (single-target maximum likelihood with the "rect" window), seeded by the FFT peak;
   a snapshot left with a single peak ends here.
6. Joint refinement (angle_joint.py) of a snapshot left with P >= 2 peaks: RELAX sweeps (Li and
   Stoica, IEEE Trans. SP, 1996), then joint Gauss-Newton steps on the P-target least-squares
   misfit; peaks not resolvable from the others are dropped, and each further peak stays only
   when the split test (angle_split.py: a likelihood ratio test of P against P - 1 sources in
   white noise, needing no noise power) says it is there, at the design false-split probability
   `split_false_alarm` for a single source.
6b. Subspace proposals (angle_subspace.py), methods "dml" (default), "esprit" and "music", for a
   snapshot with fewer than max_peaks kept whose misfit leaves room for one more: the cell values of
   the filled grid rows, forward-backward spatially smoothed into a covariance, give one more source
   than kept by ESPRIT (dml, esprit) or MUSIC (music) in azimuth, each at the strongest kept source's
   elevation; step 6 refines the set jointly over the true positions (DML, u and w) and it replaces
   the kept set when it passes the split test against the kept set's own misfit; where it does not,
   two more sources than kept are proposed and tested as a jump (step 7). Repeated while snapshots
   gain. Grid rows without a run of 3 filled cells: no proposals (esprit and music then act as dml).
7. Further sources (angle_residual.py; methods "dml", and "esprit"/"music" where step 6b has no
   subarrays), for a snapshot with fewer than max_peaks kept: alternating
   projection on the FFT grid (Ziskind and Wax, "Maximum likelihood localization of multiple
   sources by alternating projection", IEEE Trans. ASSP, 1988) proposes one more source near the
   kept ones, moving them too (two sources under one FFT peak), and another while each passes a
   screen; or the strongest peak of the fit's residual (a screen by Fisher's statistic) proposes
   one elsewhere. Step 6 refines the proposal jointly, and it replaces the kept set when it passes
   the split test against the kept set's own misfit. Two more at once (a jump): the full set must
   pass against the middle set (all but its weakest, refined again), and either the middle set
   against the kept set or the two together must explain the fraction of the kept set's misfit one
   further source would need (three sources under one beam: the best two-source fit of them can
   leave too much for the middle set to pass alone). A false jump on a single source needs the
   full-against-middle test to pass, so by the union bound a single source splits at most at twice
   the design rate; measured within the binomial band of the design rate (tests/test_superres.py).
   Repeated while snapshots gain, up to max_peaks.
8. Bounds (bounds.source_bounds): each reported source's share of the snapshot's signal energy and
   its deterministic Cramer-Rao bound given the others (snr_share, crb_unit).

Limits (by design, documented rather than hidden):
- An array with no elevation extent (one grid row) measures only u; the estimator then
  reports w = 0, elevation 0 and azimuth = asin(u) (the cone angle). Likewise an array with no
  horizontal extent reports u = 0.
- With pitch > lambda/2 the FFT grid spans only |u| < lambda / (2 * pitch) and grating lobes
  make directions ambiguous; this is a property of the array, not of the estimator.
- A target whose beam maximum lies at an invisible FFT grid point (only possible within about
  one FFT bin of endfire, u^2 + w^2 ~ 1) is not reported.
- Two targets closer than the array can separate (variance inflation above 10, step 6) stay
  one peak. Sources are added in order, each tested against the fit without it (or two at once,
  step 7): of three sources within a Rayleigh limit fewer are often reported (README gives the
  rates).
- The split test assumes white noise and a calibrated array: channel errors (rms phase errors of
  phi radians leave about 20 log10(phi) dB of the target's power, -29 dB for 2 degrees) and the range
  and Doppler sidelobes of neighbouring echoes leave a structured misfit that, on a strong target,
  the white-noise test takes for a second source; the model-error floor (model_error_db,
  angle_split.py) takes that much of the cell's energy off the misfit before the test.
- refine = False skips steps 5 to 7 (peaks stay on the FFT grid with their grid power).

The compiled kernels of steps 2-7 call each other across these modules. numba's cache checks only
the source file of the function it compiled, so after editing a kernel, clear the cache
(NUMBA_CACHE_DIR, or the __pycache__ folder beside the chain) before measuring or testing: a
cached kernel of another module still holds the old code of what it calls.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from ..errors import CubecastError, is_integer, is_real
from ..settings import ANGLE_METHODS, ProcessingSettings
from .angle_joint import relax_peaks
from .angle_peaks import bin_direction_cosines, coherence_scores, find_peaks, scatter_cells
from .angle_refine import refine_peaks
from .angle_joint import _MAX_VARIANCE_INFLATION as _MAX_INFLATION, _MISFIT_FLOOR
from .angle_residual import fit_residuals, further_sources, residual_peaks
from .angle_split import split_critical_values
from .angle_subspace import MUSIC_SCAN_FACTOR, music_scan, subarray_cells, subarray_length, subspace_proposals
from .bounds import crb_unit_covariance, source_bounds
from .fft import ifft_unnormalised_inplace
from .virtual_grid import GRID_WINDOW_NAMES, VirtualGrid, grid_window

__all__ = [
    "VirtualGrid",
    "AngleSettings",
    "AngleResult",
    "AngleEstimator",
    "crb_unit_covariance",
]

_DEFAULTS = ProcessingSettings()
# a peak is dropped during the joint sweeps when its removal costs less than this fraction of what
# the split test needs (angle_joint._prune_hopeless); the residual search tries a candidate when
# Fisher's q reaches this fraction of the test's critical value (the test decides after the refit)
_JOINT_SCREEN = 0.7
_RESIDUAL_SCREEN = 0.7


@dataclass(frozen=True)
class AngleSettings:
    """Angle estimation settings (validated on construction, CubecastError on a bad value).

    The chain builds them from ProcessingSettings (pipeline.py); the defaults of the fields both
    have are ProcessingSettings' defaults, so a default AngleSettings is the chain's.

    fft_size_azimuth    FFT size along x (>= grid n_x, checked by AngleEstimator); default 64,
                        what ProcessingSettings' automatic size (0) gives up to 32 grid columns.
    fft_size_elevation  FFT size along z (>= grid n_z); default 16, the automatic size up to 4
                        grid rows. Ignored (treated as 1) when the array has a single grid row,
                        i.e. no elevation extent.
    peak_threshold_db   an FFT peak is a candidate target when its FFT power is at least this
                        many dB relative to the strongest visible FFT point of the same snapshot
                        (with refine = False: it is reported); must be <= 0. With refinement a
                        further candidate is reported only when the split test passes, whatever
                        its power, and one the FFT did not separate can still come from the
                        residual search. Default -9 dB (angle_peak_threshold_db): above the
                        -13.3 dB first sidelobe of a uniform rectangular aperture (common
                        practice) with a few dB margin for noise.
    max_peaks           peaks reported per snapshot at most, strongest first; default 2
                        (angle_max_peaks).
    split_false_alarm   design probability that a single source in white noise is reported as
                        two (the split test's size, angle_split.py); default 0.01. On noise
                        alone the test splits less often (its first fit takes the largest
                        component).
    model_error_db      the split test's model-error floor (angle_split.py): a further source must
                        explain, beyond what the test needs in white noise, this fraction of the
                        snapshot's energy (dB re it), the relative residual the array's model
                        error (calibration, coupling, leakage) leaves; default -25 dB
                        (angle_model_error_db); must be <= 0, below -90 dB it acts as -90 dB
                        (float32 rounding).
    refine              Newton refinement on the actual element positions; default True.
    method              "dml" (default), "esprit", "music" or "fft" (angle_method, README):
                        dml proposes further sources by ESPRIT on the smoothed grid rows (step 6b)
                        and by the grid search of step 7; esprit by ESPRIT alone, music by MUSIC
                        alone (step 6b; each proposal refined by the joint DML iterations and kept
                        only by the split test). Where the grid rows have no run of 3 filled cells
                        esprit and music act as dml (step 7 only). "fft" reports the FFT peaks
                        (it sets refine = False).
    window              "rect" (default; the single-target maximum-likelihood beam), "hann"
                        (sin^2 taper without zero end weights) or "hamming"; applied separably
                        over the grid columns / rows, also inside the refinement.
    """

    fft_size_azimuth: int = 64
    fft_size_elevation: int = 16
    peak_threshold_db: float = _DEFAULTS.angle_peak_threshold_db
    max_peaks: int = _DEFAULTS.angle_max_peaks
    refine: bool = True
    window: str = "rect"
    split_false_alarm: float = _DEFAULTS.angle_split_false_alarm
    model_error_db: float = _DEFAULTS.angle_model_error_db
    method: str = _DEFAULTS.angle_method

    def __post_init__(self) -> None:
        if self.method not in ANGLE_METHODS:
            raise CubecastError(f"method must be one of {', '.join(ANGLE_METHODS)}, got {self.method!r}")
        if self.method == "fft":
            object.__setattr__(self, "refine", False)
        for name in ("fft_size_azimuth", "fft_size_elevation"):
            v = getattr(self, name)
            if not is_integer(v) or not 1 <= v <= 65536:
                raise CubecastError(f"{name} must be an integer in 1..65536, got {v!r}")
        v = self.peak_threshold_db
        if not is_real(v) or not math.isfinite(v) or v > 0:
            raise CubecastError(f"peak_threshold_db must be a finite number <= 0 dB, got {v!r}")
        if not is_integer(self.max_peaks) or not 1 <= self.max_peaks <= 64:
            raise CubecastError(f"max_peaks must be an integer in 1..64, got {self.max_peaks!r}")
        if not isinstance(self.refine, (bool, np.bool_)):
            raise CubecastError(f"refine must be true or false, got {self.refine!r}")
        v = self.split_false_alarm
        if not is_real(v) or not 0.0 < v < 1.0:
            raise CubecastError(f"split_false_alarm must be a probability in (0, 1), got {v!r}")
        v = self.model_error_db
        if not is_real(v) or not math.isfinite(v) or v > 0:
            raise CubecastError(f"model_error_db must be a finite number <= 0 dB, got {v!r}")
        if self.window not in GRID_WINDOW_NAMES:
            raise CubecastError(
                f"window must be one of {', '.join(GRID_WINDOW_NAMES)}, got {self.window!r}"
            )


@dataclass(frozen=True)
class AngleResult:
    """One row per found peak, grouped by snapshot (ascending det_index), strongest first.

    det_index      int32    which snapshot (row of the estimate() input)
    azimuth_deg    float32  atan2(u, sqrt(1 - u^2 - w^2)), positive right
    elevation_deg  float32  asin(w), positive up
    u, w           float32  direction cosines x/r and z/r
    peak_power     float32  |B(u, w)|^2 * n_virt / (sum of window weights)^2, where
                            B = sum_i c_i conj(steer_i) s_i over all channels (c_i = calibration x
                            window): a noiseless unit-amplitude target gives n_virt, white noise
                            of per-channel power sigma^2 gives sigma^2 on average (rect window).
                            For a snapshot with several peaks after the joint refinement:
                            |a_i|^2 * n_virt with a_i the joint least-squares amplitude (equal
                            to the above for a lone target; a noiseless unit-amplitude target
                            again gives n_virt whatever the others do).
    snr_share      float32  the source's share of the snapshot's signal energy, n_virt |a_k|^2 / ||A a||^2
                            (joint least-squares amplitudes a; 1 for a lone source): its SNR per element
                            is this times the snapshot's (bounds.source_bounds)
    crb_unit       float64  [n, 3]: (var_u, var_w, cov_uw) of the source's deterministic Cramer-Rao bound
                            given the others in its snapshot, at 2 |a_k|^2 / sigma^2 = 1 (divide by twice
                            its SNR); a lone source's is crb_unit_covariance's (bounds.source_bounds)
    """

    det_index: np.ndarray
    azimuth_deg: np.ndarray
    elevation_deg: np.ndarray
    u: np.ndarray
    w: np.ndarray
    peak_power: np.ndarray
    snr_share: np.ndarray
    crb_unit: np.ndarray

    def __len__(self) -> int:
        return int(self.det_index.size)


@njit(cache=True)
def _kept_peaks(n_found, keep, det, u, w, p, power_norm, out_det, out_values):
    """The kept peaks, in order: detection index, and rows azimuth = atan2(u, v), elevation =
    asin(w) (degrees, v = sqrt(1 - u^2 - w^2)), u, w and peak power * power_norm. Returns the count."""
    n = 0
    for k in range(n_found):
        if not keep[k]:
            continue
        uk, wk = u[k], w[k]
        v = np.sqrt(max(0.0, 1.0 - uk * uk - wk * wk))
        out_det[n] = det[k]
        out_values[0, n] = np.degrees(np.arctan2(uk, v))
        out_values[1, n] = np.degrees(np.arcsin(min(max(wk, -1.0), 1.0)))
        out_values[2, n] = uk
        out_values[3, n] = wk
        out_values[4, n] = p[k] * power_norm
        n += 1
    return n


class AngleEstimator:
    """Direction finding over a VirtualGrid; see the module docstring for the method.

    AngleEstimator(grid, settings=AngleSettings(), calibration=None, *, capacity=256)

    calibration: complex[n_virt] multiplied onto the channels before anything else
    (identity when None). capacity: initial number of snapshots the preallocated FFT buffers
    hold; they grow (once) when a call brings more.

    Multi-peak snapshots are refined jointly and their further peaks tested (step 6,
    angle_joint.py, angle_split.py).

    Attributes: grid, settings, calibration (complex64[n_virt]), n_fft_x, n_fft_z,
    u_grid (float64[n_fft_x]), w_grid (float64[n_fft_z]), visible (bool[n_fft_z, n_fft_x]),
    bin_u, bin_w (FFT bin spacing in direction cosine), split_critical (float64[max_peaks + 1]:
    the split test's critical value of the P-th source at index P).
    """

    def __init__(
        self,
        grid: VirtualGrid,
        settings: AngleSettings | None = None,
        calibration: np.ndarray | None = None,
        *,
        capacity: int = 256,
    ) -> None:
        if not isinstance(grid, VirtualGrid):
            raise CubecastError(f"grid must be a VirtualGrid, got {type(grid).__name__}")
        settings = AngleSettings() if settings is None else settings
        if not isinstance(settings, AngleSettings):
            raise CubecastError(f"settings must be AngleSettings, got {type(settings).__name__}")
        self.grid = grid
        self.settings = settings
        n_virt = grid.n_virt

        if calibration is None:
            cal = np.ones(n_virt, dtype=np.complex64)
        else:
            cal = np.asarray(calibration)
            if cal.ndim != 1 or cal.shape[0] != n_virt:
                raise CubecastError(
                    f"calibration: expected {n_virt} complex values (one per virtual channel), "
                    f"got shape {cal.shape}"
                )
            if not np.all(np.isfinite(cal)):
                raise CubecastError("calibration: contains non-finite values")
            cal = cal.astype(np.complex64)
        self.calibration = cal

        self.n_fft_x = 1 if grid.n_x == 1 else settings.fft_size_azimuth
        self.n_fft_z = 1 if grid.n_z == 1 else settings.fft_size_elevation
        if self.n_fft_x < grid.n_x:
            raise CubecastError(
                f"fft_size_azimuth = {settings.fft_size_azimuth} is smaller than the array's "
                f"{grid.n_x} grid columns"
            )
        if self.n_fft_z < grid.n_z:
            raise CubecastError(
                f"fft_size_elevation = {settings.fft_size_elevation} is smaller than the array's "
                f"{grid.n_z} grid rows"
            )

        lam, pitch = grid.wavelength_m, grid.pitch_m
        self.u_grid = bin_direction_cosines(self.n_fft_x, lam, pitch)
        self.w_grid = bin_direction_cosines(self.n_fft_z, lam, pitch)
        self.bin_u = lam / (pitch * self.n_fft_x)
        self.bin_w = lam / (pitch * self.n_fft_z)
        self.visible = (self.w_grid[:, None] ** 2 + self.u_grid[None, :] ** 2) <= 1.0 + 1e-12
        self._visible_f = self.visible.astype(np.float64)
        self._acc_re = np.empty(self.n_fft_x, np.float32)
        self._acc_im = np.empty(self.n_fft_x, np.float32)
        self._do_u = grid.n_x > 1
        self._do_w = grid.n_z > 1
        self._rel_thr = 10.0 ** (settings.peak_threshold_db / 10.0)

        # window weights per channel (separable over grid columns / rows)
        wx = grid_window(settings.window, grid.n_x)
        wz = grid_window(settings.window, grid.n_z)
        chan_win = wx[grid.channel_ix] * wz[grid.channel_iz]
        self._power_norm = n_virt / float(chan_win.sum()) ** 2
        self._chan_weight = (cal.astype(np.complex128) * chan_win)
        self._chan_win = chan_win.astype(np.float64)
        self._cal128 = cal.astype(np.complex128)
        self._win_sum2 = float(chan_win.sum()) ** 2
        # channel weights into the grid cells: cell means (windowed, calibrated) for the estimation
        # image; cell sums (calibrated, no window) for coherence, where the on-grid beam is a^H x
        self._w_mean = (self._chan_weight / grid.cell_counts[grid.channel_cell]).astype(np.complex64)
        # step 7: the residual is already calibrated (cell weights: the window over the cell counts)
        self._w_window = (chan_win / grid.cell_counts[grid.channel_cell]).astype(np.complex64)
        self._w_sum = cal.copy()
        self._chan_iz = grid.channel_iz.astype(np.int64)
        self._chan_ix = grid.channel_ix.astype(np.int64)

        # steering geometry for refinement: phase = kx*u + kz*w on centred actual positions
        k0 = 2.0 * np.pi / lam
        pos = grid.positions_m
        self._kx = k0 * (pos[:, 0] - pos[:, 0].mean())
        self._kz = k0 * (pos[:, 2] - pos[:, 2].mean())
        # a lone source's bound at 2 SNR = 1 (pairs: bounds.source_bounds)
        self._crb_one = np.array(crb_unit_covariance(grid.positions_m, lam)[:3])
        # the split test (angle_split.py): critical value of the P-th source at index P
        self.split_critical = split_critical_values(self._kx, self._kz, lam / pitch, lam / pitch, self._do_u,
                                                    self._do_w, settings.max_peaks, settings.split_false_alarm)
        self._floor_fraction = max(10.0 ** (settings.model_error_db / 10.0), _MISFIT_FLOOR)  # angle_split.py
        self._no_test = np.full(self.split_critical.size, -1e300)  # critical values every set passes

        kz = np.arange(self.n_fft_z)[:, None] * np.arange(grid.n_z)[None, :]
        self._dft_z = np.exp(2j * np.pi * kz / self.n_fft_z).astype(np.complex64)
        self._power = np.empty((self.n_fft_z, self.n_fft_x), dtype=np.float64)
        # step 7: a_i^H a_j = pattern[i - j] for grid directions i, j (the cell counts' transform)
        fz = np.exp(2j * np.pi * np.outer(np.arange(self.n_fft_z), np.arange(grid.n_z)) / self.n_fft_z)
        fxm = np.exp(2j * np.pi * np.outer(np.arange(grid.n_x), np.arange(self.n_fft_x)) / self.n_fft_x)
        self._pattern = np.tile(fz @ grid.counts.astype(np.complex128) @ fxm, (2, 2))  # tiled: no modulo
        # the grid search moves a source at most half a Rayleigh spacing (n_fft / n cells) per step
        self._reach_z = max(1, self.n_fft_z // (2 * grid.n_z)) if grid.n_z > 1 else 0
        self._reach_x = max(1, self.n_fft_x // (2 * grid.n_x)) if grid.n_x > 1 else 0
        self._img = np.empty((self.n_fft_z, self.n_fft_x), dtype=np.complex128)
        self._ones = np.ones(n_virt, np.complex128)
        # step 6b (angle_subspace.py): subarrays of the filled grid rows
        length = subarray_length(grid.counts) if grid.n_x > 1 else 0
        self._sub = subarray_cells(grid.counts, grid.cells, length)
        # dml: ESPRIT proposals (where the rows allow) and the grid search of step 7; esprit, music: their
        # proposals alone (step 7 only where the rows allow no subarrays: then they are dml)
        self.subspace_active = settings.refine and length > 0
        self.grid_search_active = settings.refine and (settings.method == "dml" or length == 0)
        self._cell_weight = (1.0 / grid.cell_counts[grid.channel_cell]).astype(np.float64)
        self._chan_cell = grid.channel_cell.astype(np.int64)
        self._k_pitch = 2.0 * np.pi / lam * pitch
        period = lam / pitch
        n_scan = MUSIC_SCAN_FACTOR * grid.n_x
        self._u_scan = (np.arange(n_scan) + 0.5) / n_scan * min(period, 2.0) - min(period, 2.0) / 2.0
        self._scan = music_scan(self._u_scan, length, self._k_pitch)
        self._capacity = 0
        self._allocate(max(1, int(capacity)))

    def _allocate(self, capacity: int) -> None:
        # Flat storage, viewed per call as z-major [rows, n_det, columns] arrays so that the
        # x FFT runs along the contiguous last axis and the short z transform is one matrix
        # product (a DFT matrix) over all snapshots at once.
        g, mp = self.grid, self.settings.max_peaks
        self._capacity = capacity
        self._fft_x_flat = np.empty(capacity * g.n_z * self.n_fft_x, dtype=np.complex64)
        self._pk_det = np.empty(capacity * mp, dtype=np.int64)
        self._pk_iz = np.empty(capacity * mp, dtype=np.int64)
        self._pk_ix = np.empty(capacity * mp, dtype=np.int64)
        self._pk_pow = np.empty(capacity * mp, dtype=np.float64)
        self._pk_keep = np.empty(capacity * mp, dtype=np.bool_)
        self._pk_u = np.empty(capacity * mp, dtype=np.float64)
        self._pk_w = np.empty(capacity * mp, dtype=np.float64)
        self._pk_p = np.empty(capacity * mp, dtype=np.float64)
        self._resid = np.empty((capacity, g.n_virt), dtype=np.complex64)
        self._open = np.empty(capacity, dtype=np.bool_)
        self._new_n = np.empty(capacity, dtype=np.int64)
        self._new_u = np.empty((capacity, mp), dtype=np.float64)
        self._new_w = np.empty((capacity, mp), dtype=np.float64)
        self._first_n = np.empty(capacity, dtype=np.int64)
        self._first_u = np.empty((capacity, mp), dtype=np.float64)
        self._first_w = np.empty((capacity, mp), dtype=np.float64)
        self._res_iz = np.empty(capacity, dtype=np.int64)
        self._res_ix = np.empty(capacity, dtype=np.int64)
        self._y_energy = np.empty(capacity, dtype=np.float64)
        self._r_energy = np.empty(capacity, dtype=np.float64)
        self._q_need = np.empty(capacity, dtype=np.float64)
        self._cand = np.empty(capacity, dtype=np.bool_)

    def _check(self, snapshots) -> np.ndarray:
        x = np.asarray(snapshots)
        if x.ndim != 2 or x.shape[1] != self.grid.n_virt:
            raise CubecastError(
                f"snapshots: expected shape (n_det, {self.grid.n_virt}), got {x.shape}"
            )
        x = np.ascontiguousarray(x, dtype=np.complex64)
        if x.shape[0] > self._capacity:
            self._allocate(max(x.shape[0], 2 * self._capacity))
        return x

    def _row_spectra(self, x: np.ndarray, weights: np.ndarray) -> np.ndarray:
        """Grid rows transformed along x: [n_z, n_det, n_fft_x], kernel exp(+j 2 pi k n / N).

        Each channel's value times its weight is added into its grid cell (zero padded to n_fft_x),
        then one in-place FFT runs along the contiguous rows. The z transform (zero-padded to
        n_fft_z) is a small DFT matrix applied inside the numba kernels, which never materialise the
        full [n_fft_z, n_det, n_fft_x] image: with only a few rows that is much cheaper than an FFT
        along a non-contiguous axis.
        """
        n = x.shape[0]
        nz, kx = self.grid.n_z, self.n_fft_x
        g = self._fft_x_flat[: nz * n * kx].reshape(nz, n, kx)
        scatter_cells(x, weights, self._chan_iz, self._chan_ix, g)
        return ifft_unnormalised_inplace(g, axis=2)

    def estimate(self, snapshots: np.ndarray) -> AngleResult:
        """Find and refine angle peaks; snapshots complex64[n_det, n_virt] -> AngleResult.

        Snapshots with several peaks are refined jointly (step 6, angle_joint.py)."""
        x = self._check(snapshots)
        n = x.shape[0]
        if n == 0:
            return _empty_result()
        fx = self._row_spectra(x, self._w_mean)
        n_found = find_peaks(
            fx, self._dft_z, n, self.visible, self._rel_thr, self.settings.max_peaks, self._power,
            self._acc_re, self._acc_im, self._pk_det, self._pk_iz, self._pk_ix, self._pk_pow,
        )
        det = self._pk_det[:n_found]
        refine_peaks(
            x, self._chan_weight, self._kx, self._kz, n_found, det, self.u_grid, self.w_grid, self._pk_ix,
            self._pk_iz,
            self._do_u, self._do_w, bool(self.settings.refine), self.bin_u, self.bin_w,
            self._pk_keep, self._pk_u, self._pk_w, self._pk_p,
        )
        keep, u, w, p = self._pk_keep, self._pk_u, self._pk_w, self._pk_p
        if self.settings.refine and self.settings.max_peaks > 1:
            self._relax(x, n_found, det, keep, u, w, p)
            if self.subspace_active:
                n_found, det, keep, u, w, p = self._subspace_search(x, n_found, det, keep, u, w, p)
            if self.grid_search_active:
                n_found, det, keep, u, w, p = self._residual_search(x, n_found, det, keep, u, w, p)
        det_index = np.empty(n_found, np.int32)
        values = np.empty((5, n_found), np.float32)  # azimuth, elevation, u, w, peak power
        n_kept = _kept_peaks(n_found, keep, det, u, w, p, self._power_norm, det_index, values)
        det_index = det_index[:n_kept]
        share, crb = np.empty(n_kept, np.float32), np.empty((n_kept, 3), np.float64)
        source_bounds(x, self._cal128, self._kx, self._kz, det_index, values[2, :n_kept].astype(np.float64),
                      values[3, :n_kept].astype(np.float64), self._do_u, self._do_w, self._crb_one, share, crb)
        return AngleResult(det_index=det_index, azimuth_deg=values[0, :n_kept],
                           elevation_deg=values[1, :n_kept], u=values[2, :n_kept], w=values[3, :n_kept],
                           peak_power=values[4, :n_kept], snr_share=share, crb_unit=crb)

    def _relax(self, x, n_found, det, keep, u, w, p, crit=None):
        """Step 6 (angle_joint.py) on the peak arrays, in place (crit: the split test's critical values, by
        default split_critical)."""
        crit = self.split_critical if crit is None else crit
        relax_peaks(x, self._cal128, self._chan_win, self._kx, self._kz, n_found, det, self._do_u, self._do_w,
                    self.bin_u, self.bin_w, crit, _JOINT_SCREEN, self._win_sum2, self._floor_fraction,
                    keep, u, w, p)

    def _open_snapshots(self, x, n_found, det, keep, u, w, round_):
        """The snapshots whose misfit leaves room for one more source to pass the split test (fit_residuals
        fills the residuals, energies and open flags of the first len(x) rows); after the first round only
        those that gained in the last one (self._cand). Returns how many are open."""
        n = x.shape[0]
        open_slot = self._open[:n]
        n_open = fit_residuals(x, self._cal128, self._kx, self._kz, n_found, det, keep, u, w, self.settings.max_peaks,
                               self.split_critical, self._floor_fraction, _RESIDUAL_SCREEN, self._resid[:n],
                               self._y_energy[:n], self._r_energy[:n], self._q_need[:n], open_slot)
        if round_ > 0:
            open_slot &= self._cand[:n]
            n_open = int(open_slot.sum())
        return n_open

    def _subspace_search(self, x, n_found, det, keep, u, w, p):
        """Step 6b (angle_subspace.py): for every snapshot with fewer than max_peaks kept peaks whose misfit
        leaves room for one more to pass the split test (fit_residuals), the smoothed-subspace estimate of one
        more source than kept is refined jointly (step 6) as a set and replaces the kept set when it passes the
        split test against the kept set's misfit (_try_sets); where it did not, that of two more (a jump).
        Repeated for the snapshots that gained, up to max_peaks."""
        n = x.shape[0]
        mp = self.settings.max_peaks
        crit, frac = self.split_critical, self._floor_fraction
        open_slot, cand = self._open[:n], self._cand[:n]
        y_energy, r_energy, q_need = self._y_energy[:n], self._r_energy[:n], self._q_need[:n]
        new_n, new_u, new_w = self._new_n[:n], self._new_u[:n], self._new_w[:n]
        jump_n, jump_u, jump_w = self._first_n[:n], self._first_u[:n], self._first_w[:n]
        for round_ in range(mp - 1):
            if self._open_snapshots(x, n_found, det, keep, u, w, round_) == 0:
                break
            n_new = subspace_proposals(x, self._cal128, self._chan_cell, self._cell_weight, self.grid.n_cells,
                                       self._sub, self._k_pitch, self.settings.method == "music", self._u_scan,
                                       self._scan, self._kx, self._kz, n_found, det, keep, w, open_slot, r_energy,
                                       q_need, crit, _RESIDUAL_SCREEN, frac, mp, new_n, new_u, new_w, jump_n, jump_u,
                                       jump_w)
            if n_new == 0:
                break
            won = np.zeros(n, np.bool_)
            if new_n.any():
                n_found, det, keep, u, w, p, won = self._try_sets(x, n_found, det, keep, u, w, p, new_n, new_u,
                                                                   new_w, r_energy, y_energy)
            retry = np.where(won, 0, jump_n)
            if retry.any():
                n_found, det, keep, u, w, p, more = self._try_sets(x, n_found, det, keep, u, w, p, retry, jump_u,
                                                                    jump_w, r_energy, y_energy)
                won |= more
            if not won.any():
                break
            cand[:] = won
        return n_found, det, keep, u, w, p

    def _residual_search(self, x, n_found, det, keep, u, w, p):
        """Step 7 (angle_residual.py): a source the FFT stage did not separate. For every snapshot with
        fewer than max_peaks kept peaks whose misfit leaves room for one more to pass the split test
        (fit_residuals: else nothing more is computed for it), alternating projection on the grid
        proposes one more source (moving the kept ones too); where the proposal's grid fit could pass
        the split test, all are refined jointly (step 6) from it, and the larger set replaces the kept
        one when it passes the split test against the kept set's own misfit. Repeated while snapshots
        gain, up to max_peaks. Returns the peak arrays (new ones when any snapshot gained, the old rows
        of a gaining snapshot left unkept)."""
        n = x.shape[0]
        mp = self.settings.max_peaks
        crit, frac = self.split_critical, self._floor_fraction
        resid, open_slot, cand = self._resid[:n], self._open[:n], self._cand[:n]
        y_energy, r_energy, q_need = self._y_energy[:n], self._r_energy[:n], self._q_need[:n]
        for round_ in range(mp - 1):
            if self._open_snapshots(x, n_found, det, keep, u, w, round_) == 0:
                break
            res_iz, res_ix = self._res_iz[:n], self._res_ix[:n]
            residual_peaks(self._row_spectra(resid, self._w_window), self._dft_z, n, self._visible_f, open_slot,
                           self.grid.n_cells, q_need, self._power, self._acc_re, self._acc_im, res_iz, res_ix)
            fx = self._row_spectra(x, self._w_sum)  # the same buffer as the residual's rows above
            new_n, new_u, new_w = self._new_n[:n], self._new_u[:n], self._new_w[:n]
            first_n, first_u, first_w = self._first_n[:n], self._first_u[:n], self._first_w[:n]
            n_new = further_sources(fx, self._dft_z, self._pattern, self._visible_f, n, open_slot, n_found, det,
                                    keep, u, w, self.u_grid, self.w_grid, y_energy, r_energy, crit,
                                    _RESIDUAL_SCREEN, frac, self.grid.n_virt / _MAX_INFLATION, self._reach_z,
                                    self._reach_x, res_iz, res_ix, self._img,
                                    new_n, new_u, new_w, first_n, first_u, first_w)
            if n_new == 0:
                break
            # the largest proposed set first; where it did not win, the smallest
            n_found, det, keep, u, w, p, won = self._try_sets(x, n_found, det, keep, u, w, p, new_n, new_u, new_w,
                                                               r_energy, y_energy)
            retry = np.where(~won & (first_n < new_n), first_n, 0)
            if retry.any():
                n_found, det, keep, u, w, p, more = self._try_sets(x, n_found, det, keep, u, w, p, retry, first_u,
                                                                    first_w, r_energy, y_energy)
                won |= more
            if not won.any():
                break
            cand[:] = won
        return n_found, det, keep, u, w, p

    def _try_sets(self, x, n_found, det, keep, u, w, p, new_n, new_u, new_w, r_energy, y_energy):
        """The proposed sets (further_sources) refined jointly as a sub-batch (step 6, which tests them
        from the most sources down); a snapshot takes its refined set when it kept more sources than
        before and passes the split test of one more source against the misfit the kept set left
        (r_energy). Returns the peak arrays and which snapshots gained."""
        n = x.shape[0]
        gain = np.flatnonzero(new_n > 0)
        count = new_n[gain]
        sub_det = np.repeat(np.arange(gain.size), count)
        slot = np.arange(sub_det.size) - np.repeat(np.cumsum(count) - count, count)
        sub_u = new_u[gain[sub_det], slot].copy()
        sub_w = new_w[gain[sub_det], slot].copy()
        # rank (which of an inseparable pair stays): the kept peaks' powers in order, the new one last
        keep, det = keep[:n_found].copy(), det[:n_found]
        rows = np.flatnonzero(keep & (new_n > 0)[det])  # grouped by snapshot, ascending like gain
        before = np.bincount(det[rows], minlength=n)[gain]  # kept peaks of each gaining snapshot
        sub_p = np.zeros(sub_det.size)
        sub_p[slot < before[sub_det]] = p[rows]
        xs = np.ascontiguousarray(x[gain])
        sub_keep, e_more, n_kept = self._refine_sets(xs, sub_det, sub_u, sub_w, sub_p)
        e_fewer = r_energy[gain]
        floor = self._floor_fraction * y_energy[gain]
        won = (n_kept == before + 1) & self._passes(e_fewer, e_more, before + 1, floor)
        jump = np.flatnonzero(n_kept == before + 2)
        if jump.size:
            # two more at once: the middle set (all but the weakest, step 6 writes them strongest first)
            # must pass against the kept set, and the full set against the middle one
            is_jump = np.isin(sub_det, jump)
            rank_in = np.arange(sub_det.size) - np.repeat(np.cumsum(count) - count, count)
            mid = np.flatnonzero(is_jump & sub_keep & (rank_in < n_kept[sub_det] - 1))
            mid_det = np.searchsorted(jump, sub_det[mid])
            mid_keep, e_mid, mid_kept = self._refine_sets(np.ascontiguousarray(xs[jump]), mid_det, sub_u[mid].copy(),
                                                          sub_w[mid].copy(), sub_p[mid].copy(), test=False)
            # (refined without a split test inside) must pass against the kept set, or the two together
            # explain the fraction of the kept set's misfit that one further source would need (three sources
            # under one beam: a two-source fit of them can leave too much for the middle set to pass), and the
            # full set must pass against the middle one
            first = (self._passes(e_fewer[jump], e_mid, before[jump] + 1, floor[jump])
                     | self._passes(e_fewer[jump], e_more[jump], before[jump] + 1, floor[jump]))
            won[jump] = ((mid_kept == before[jump] + 1) & first
                         & self._passes(e_mid, e_more[jump], before[jump] + 2, floor[jump]))
        cand = np.zeros(n, np.bool_)
        if not won.any():
            return n_found, det, keep, u, w, p, cand
        cand[gain[won]] = True
        keep[np.flatnonzero(keep & cand[det])] = False
        take = won[sub_det]
        det_all = np.concatenate([det, gain[sub_det[take]]])
        order = np.argsort(det_all, kind="stable")  # each snapshot's rows together, the new ones last
        return (det_all.size, det_all[order], np.concatenate([keep, sub_keep[take]])[order],
                np.concatenate([u[:n_found], sub_u[take]])[order], np.concatenate([w[:n_found], sub_w[take]])[order],
                np.concatenate([p[:n_found], sub_p[take]])[order], cand)

    def _refine_sets(self, xs, sub_det, sub_u, sub_w, sub_p, test=True):
        """Step 6 on the sets of sub_det (snapshot rows of xs), in place on sub_u, sub_w, sub_p; returns
        (keep, the kept set's misfit per snapshot, its size). test = False: no split test inside (every
        critical value passed; peaks still merge when inseparable), the caller tests."""
        m = xs.shape[0]
        sub_keep = np.ones(sub_det.size, np.bool_)
        self._relax(xs, sub_det.size, sub_det, sub_keep, sub_u, sub_w, sub_p,
                    None if test else self._no_test)
        resid = np.empty((m, self.grid.n_virt), np.complex64)
        open_slot, energy, misfit, q_need = np.empty(m, np.bool_), np.empty(m), np.empty(m), np.empty(m)
        fit_residuals(xs, self._cal128, self._kx, self._kz, sub_det.size, sub_det, sub_keep, sub_u, sub_w,
                      self.settings.max_peaks + 1, self.split_critical, self._floor_fraction, _RESIDUAL_SCREEN,
                      resid, energy, misfit, q_need, open_slot)
        return sub_keep, misfit, np.bincount(sub_det[sub_keep], minlength=m)

    def _passes(self, e_fewer, e_more, n_sources, floor):
        """The split test (angle_joint.split_passes) of the n_sources-th source per snapshot, with the
        model-error floor `floor` taken off the misfit left without it."""
        crit = self.split_critical[np.minimum(n_sources, self.split_critical.size - 1)]
        return (e_fewer > floor) & (e_fewer - floor - e_more >= crit * (e_fewer - floor))

    def coherence(self, snapshots: np.ndarray) -> np.ndarray:
        """float32[n_det] in [0, 1]: max over visible FFT grid points of |a^H x|^2 / (n_virt ||x||^2).

        x is the calibrated snapshot, a the steering vector of the actual elements (redundant
        channels of one cell share it), no window. By Cauchy-Schwarz it is 1 exactly when the
        snapshot is one plane wave arriving from a grid direction (slightly less between grid
        points, scalloping of the zero-padded FFT) and drops when channels disagree in phase,
        e.g. after a wrong TDM Doppler phase compensation. All-zero snapshots score 0.
        """
        x = self._check(snapshots)
        n = x.shape[0]
        if n == 0:
            return np.empty(0, dtype=np.float32)
        fx = self._row_spectra(x, self._w_sum)
        out = np.empty(n, np.float32)
        coherence_scores(fx, self._dft_z, n, self._visible_f, x, self.calibration, self.grid.n_virt, self._power,
                         self._acc_re, self._acc_im, out)
        return out


def _empty_result() -> AngleResult:
    f = np.empty(0, dtype=np.float32)
    return AngleResult(np.empty(0, dtype=np.int32), f, f.copy(), f.copy(), f.copy(), f.copy(), f.copy(),
                       np.empty((0, 3), np.float64))
