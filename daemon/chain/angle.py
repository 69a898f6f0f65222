"""Angle estimation over a MIMO virtual array.

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

Processing per call of AngleEstimator.estimate():

1. Calibrate: multiply channel i by calibration[i].
2. Grid: every channel belongs to one (iz, ix) cell of a regular grid of pitch `pitch_m`
   (VirtualGrid); redundant channels in one cell are averaged; the (optionally windowed) cell
   image is zero-padded to fft_size_elevation x fft_size_azimuth.
3. 2D zero-padded transform with kernel exp(+j 2 pi k n / N), so bin k maps to
   u = (lambda / pitch) * k / n_fft with k wrapped into [-n_fft/2, n_fft/2): a batched numpy FFT
   along x, then a small DFT matrix along z (few rows) inside the numba kernels.
4. Local maxima of the beam power (8-neighbourhood, periodic) at visible grid points
   (u^2 + w^2 <= 1), at or above `peak_threshold_db` relative to the strongest visible grid
   point of the same snapshot; at most `max_peaks` per snapshot, strongest first.
5. Refinement: Newton iterations with analytic first and second derivatives on
   P(u, w) = |sum_i c_i conj(steer_i(u, w)) s_i|^2 over the ACTUAL element positions
   (c_i = calibration times window weight; with the default "rect" window this is the
   single-target maximum-likelihood estimate), seeded by the FFT peak, each step bounded to one
   FFT bin. Refined peaks that land within half a bin of a stronger refined peak of the same
   snapshot are dropped. A refined point outside the visible region is pulled back onto the
   unit circle u^2 + w^2 = 1. A snapshot left with a single peak ends here.
6. Joint refinement of a snapshot left with P >= 2 peaks, each of which the single-target fit
   of step 5 pulls towards the others. With y the calibrated snapshot and S the P steering
   vectors on the actual element positions, the criterion is the P-target least-squares misfit
   ||y - S a||^2 with the amplitudes a at their joint least-squares value (S^H S)^-1 S^H y:
   - RELAX sweeps (Li and Stoica, "Efficient mixed-spectrum estimation with applications to
     target feature extraction", IEEE Trans. SP, 1996): for each peak i, subtract the others'
     fits, y - sum_{j != i} a_j S_j, refine peak i as a single target on that residual with the
     Newton iteration of step 5 (window applied to the residual; the full iteration on the
     first sweep, one step on later ones), refit all amplitudes jointly; at most 8 sweeps,
     fewer when no peak moves by more than 0.01 FFT bin in a sweep;
   - then joint Gauss-Newton (Levenberg-Marquardt) steps on all P directions at once, up to
     20, until the step is below 1e-4 FFT bin. The cyclic sweeps alone converge slowly when
     peaks are close (antiphase targets half a Rayleigh spacing apart are still ~40 % off
     after 30 sweeps); the joint steps converge quadratically from where the sweeps stop. They
     minimise the unweighted misfit: the window shapes only the FFT stage and the sweeps.
   After every amplitude fit a peak is dropped (and the rest refitted) when its joint power
   |a_i|^2 is below the peak_threshold_db fraction of the strongest one (e.g. a sidelobe or a
   ghost of another peak, which the others' fits explain), or when the array cannot tell it
   from the others: variance inflation n_virt * ((S^H S)^-1)_ii above 10 (for a pair, a
   normalised steering correlation above ~0.95), in which case the weaker of the inflated
   peaks goes, so peaks that converge onto each other merge into the stronger. After a drop
   the sweeps and joint steps run again (at most 3 rounds). Reported powers are |a_i|^2 *
   n_virt (the scale of a lone target's beam power). If a single peak survives, its step-5
   result is reported unchanged. Noiseless data of P plane waves fit with zero residual at the
   truth (the global minimum, reached in every case tested); in noise the result is a local
   minimum of the misfit, i.e. the P-target deterministic maximum-likelihood estimate when that
   minimum is the global one.
   Cost: about 10 us per two-peak snapshot on the bundled sensor (on average 4 sweeps and 2
   joint steps), growing steeply with P (every peak update refits all P amplitudes).
7. Residual search (as in CLEAN, Hogbom 1974): a snapshot left with fewer than max_peaks peaks
   may hold a target the FFT stage did not separate (a weak one under a strong one's beam or
   sidelobe). The calibrated snapshot minus the joint least-squares fit of its peaks is
   transformed as in steps 2-3 (same window); its strongest visible grid point joins the peaks
   when (a) its power is at least peak_threshold_db of the strongest peak's |a|^2 on the same
   scale and (b) the residual is one tone rather than noise by Fisher's g test (g = maximum
   beam power / (n_cells * residual cell energy), 1 for a lone tone; critical value at
   RESIDUAL_FALSE_ALARM per snapshot from the first term of Fisher's 1929 series). Step 6 then
   runs again on that snapshot, the new peak ranked last (in a pair the array cannot separate,
   it is the one that goes). One pass: at most one peak is added per snapshot.

Limits (by design, documented rather than hidden):
- An array with no elevation extent (one grid row) measures only u; the estimator then
  reports w = 0, elevation 0 and azimuth = asin(u) (the cone angle). Likewise an array with no
  horizontal extent reports u = 0.
- With pitch > lambda/2 the FFT grid spans only |u| < lambda / (2 * pitch) and grating lobes
  make directions ambiguous; this is a property of the array, not of the estimator.
- A target whose beam maximum lies at an invisible FFT grid point (only possible within about
  one FFT bin of endfire, u^2 + w^2 ~ 1) is not reported.
- Two targets closer than the array can separate (variance inflation above 10, step 6) stay
  one peak. Step 7 adds at most one peak per snapshot and only where the residual is a clear
  single tone, so of two weak targets hidden under a strong one neither may be found.
- refine = False skips steps 5 and 6 (peaks stay on the FFT grid with their grid power).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from ..errors import CubecastError, is_integer, is_real

from .bounds import crb_unit_covariance
from .fft import ifft_unnormalised_inplace

__all__ = [
    "VirtualGrid",
    "AngleSettings",
    "AngleResult",
    "AngleEstimator",
    "crb_unit_covariance",
    "WINDOW_NAMES",
]

WINDOW_NAMES = ("rect", "hann", "hamming")

_OFF_GRID_FRACTION = 0.01  # an element may sit at most 1 % of the pitch off its grid cell
_MAX_NEWTON_ITERATIONS = 12
# joint (RELAX) refinement of multi-peak snapshots, module doc step 6
_MAX_RELAX_SWEEPS = 8
_RELAX_MOVE_TOL = 1e-2  # FFT bins: a sweep in which no peak moves further ends the sweeps
_RELAX_NEWTON_ITERATIONS = 1  # Newton steps per peak on the sweeps after the first
_RELAX_TRUST_BINS = 1e-6  # FFT bins: smaller Newton steps skip the power check (rounding level)
_MAX_VARIANCE_INFLATION = 10.0  # a pair with steering correlation above ~0.95 merges
_GRAM_RELATIVE_FLOOR = 1e-9  # Cholesky pivot floor relative to n_virt: singular Gram matrix
_MAX_JOINT_ITERATIONS = 20  # joint Gauss-Newton iterations after the sweeps
_JOINT_STEP_TOL = 1e-4  # FFT bins: a smaller step ends the joint iterations
_MAX_RELAX_ROUNDS = 3  # sweeps + joint iterations again after a peak was dropped
# step 7: chance that noise alone passes Fisher's g test in one snapshot's residual (nominal: the
# zero-padded grid's maximum runs a little above the independent bins' the test assumes)
RESIDUAL_FALSE_ALARM = 1e-3


# --------------------------------------------------------------------------------------------
# Virtual grid
# --------------------------------------------------------------------------------------------


def _grid_offset(coords_pitch: np.ndarray, tol: float) -> tuple[float, np.ndarray]:
    """Common fractional offset of 1D coordinates in pitch units and who disagrees with it.

    The reference is the fractional offset shared (within `tol`) by the most elements, so a
    single bad element is the one named, whichever index it has.
    """
    frac = coords_pitch - np.floor(coords_pitch)
    diff = np.abs(frac[:, None] - frac[None, :])
    diff = np.minimum(diff, 1.0 - diff)  # circular distance on [0, 1)
    agree = (diff <= tol).sum(axis=1)
    ref = int(np.argmax(agree))  # ties -> lowest index
    d = coords_pitch - frac[ref]
    resid = np.abs(d - np.round(d))
    return float(frac[ref]), resid


class VirtualGrid:
    """A planar virtual array mapped onto an integer (iz, ix) grid of spacing `pitch_m`.

    Build it with VirtualGrid.from_positions(). Attributes (all read-only by convention):

    positions_m     float64[n_virt, 3]  the element positions as given
    wavelength_m    float               carrier wavelength
    pitch_m         float               grid spacing in x and z
    n_virt          int                 number of virtual channels
    n_x, n_z        int                 grid size (columns, rows)
    origin_x_m, origin_z_m  float       x and z of grid cell (0, 0)
    channel_ix, channel_iz  int32[n_virt]  the grid column / row of each channel
    channel_cell    int32[n_virt]       index of each channel's cell in `cells`
    cells           int32[n_cells, 2]   the unique occupied cells as (iz, ix), row-major order
    cell_counts     int32[n_cells]      channels per unique cell (>1 means redundant)
    counts          int32[n_z, n_x]     channels per grid cell (0 = hole)
    n_cells         int                 number of occupied cells
    aperture_x_m, aperture_z_m  float   max - min of the element x / z positions
    aperture_x_wavelengths, aperture_z_wavelengths  float   the same in wavelengths
    n_holes         int                 empty cells inside the n_z x n_x bounding grid
    n_redundant     int                 channels beyond the first in shared cells
    """

    def __init__(
        self,
        positions_m: np.ndarray,
        wavelength_m: float,
        pitch_m: float,
        channel_iz: np.ndarray,
        channel_ix: np.ndarray,
        origin_x_m: float,
        origin_z_m: float,
    ) -> None:
        self.positions_m = positions_m
        self.wavelength_m = float(wavelength_m)
        self.pitch_m = float(pitch_m)
        self.n_virt = int(positions_m.shape[0])
        self.channel_iz = channel_iz.astype(np.int32)
        self.channel_ix = channel_ix.astype(np.int32)
        self.n_z = int(channel_iz.max()) + 1
        self.n_x = int(channel_ix.max()) + 1
        self.origin_x_m = float(origin_x_m)
        self.origin_z_m = float(origin_z_m)
        flat = self.channel_iz.astype(np.int64) * self.n_x + self.channel_ix
        uniq, inverse, cnt = np.unique(flat, return_inverse=True, return_counts=True)
        self.cells = np.stack([uniq // self.n_x, uniq % self.n_x], axis=1).astype(np.int32)
        self.cell_counts = cnt.astype(np.int32)
        self.channel_cell = inverse.reshape(-1).astype(np.int32)
        self.n_cells = int(uniq.size)
        counts = np.zeros((self.n_z, self.n_x), dtype=np.int32)
        counts[self.cells[:, 0], self.cells[:, 1]] = self.cell_counts
        self.counts = counts
        self.n_holes = int(np.count_nonzero(counts == 0))
        self.n_redundant = int(self.n_virt - self.n_cells)
        self.aperture_x_m = float(np.ptp(positions_m[:, 0]))
        self.aperture_z_m = float(np.ptp(positions_m[:, 2]))
        self.aperture_x_wavelengths = self.aperture_x_m / self.wavelength_m
        self.aperture_z_wavelengths = self.aperture_z_m / self.wavelength_m

    @classmethod
    def from_positions(
        cls,
        virtual_positions_m: np.ndarray,
        wavelength_m: float,
        pitch_m: float | None = None,
    ) -> "VirtualGrid":
        """Map a planar layout (uniform, sparse, with holes or redundant elements) onto a grid.

        virtual_positions_m: float[n_virt, 3] positions (x, y, z) in metres, the array in the
        x-z plane. pitch_m: grid spacing, default wavelength_m / 2. Raises CubecastError if an
        element is off-grid (in x or z) or out of plane (y) by more than 1 % of the pitch.
        """
        try:
            pos = np.array(virtual_positions_m, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise CubecastError(f"virtual_positions_m: not a numeric array ({exc})") from None
        if pos.ndim != 2 or pos.shape[1] != 3 or pos.shape[0] < 1:
            raise CubecastError(
                f"virtual_positions_m: expected shape (n_virt >= 1, 3), got {pos.shape}"
            )
        if not np.all(np.isfinite(pos)):
            bad = int(np.argwhere(~np.all(np.isfinite(pos), axis=1))[0, 0])
            raise CubecastError(f"virtual_positions_m: element {bad} has a non-finite coordinate")
        if not (is_real(wavelength_m) and math.isfinite(wavelength_m) and wavelength_m > 0):
            raise CubecastError(f"wavelength_m must be a finite number > 0, got {wavelength_m!r}")
        if pitch_m is None:
            pitch_m = wavelength_m / 2.0
        if not (is_real(pitch_m) and math.isfinite(pitch_m) and pitch_m > 0):
            raise CubecastError(f"pitch_m must be a finite number > 0, got {pitch_m!r}")
        pitch = float(pitch_m)
        tol = _OFF_GRID_FRACTION

        ix_f = pos[:, 0] / pitch
        iz_f = pos[:, 2] / pitch
        off_x, res_x = _grid_offset(ix_f, tol)
        off_z, res_z = _grid_offset(iz_f, tol)
        for axis, res in (("x", res_x), ("z", res_z)):
            bad = np.flatnonzero(res > tol)
            if bad.size:
                i = int(bad[0])
                raise CubecastError(
                    f"virtual_positions_m: element {i} at {axis} = {pos[i, 'xyz'.index(axis)]:.6g} m "
                    f"is off the {pitch:.6g} m grid by {res[i] * 100:.2f} % of the pitch "
                    f"(limit {tol * 100:.0f} %)"
                    + (f"; {bad.size - 1} more element(s) off-grid" if bad.size > 1 else "")
                )
        y_dev = np.abs(pos[:, 1] - np.median(pos[:, 1])) / pitch
        bad = np.flatnonzero(y_dev > tol)
        if bad.size:
            i = int(bad[0])
            raise CubecastError(
                f"virtual_positions_m: element {i} at y = {pos[i, 1]:.6g} m is out of the array "
                f"plane by {y_dev[i] * 100:.2f} % of the pitch (limit {tol * 100:.0f} %); "
                "the virtual array must lie in the x-z plane"
            )
        ix = np.round(ix_f - off_x).astype(np.int64)
        iz = np.round(iz_f - off_z).astype(np.int64)
        ix0, iz0 = int(ix.min()), int(iz.min())
        return cls(
            positions_m=pos,
            wavelength_m=float(wavelength_m),
            pitch_m=pitch,
            channel_iz=iz - iz0,
            channel_ix=ix - ix0,
            origin_x_m=(ix0 + off_x) * pitch,
            origin_z_m=(iz0 + off_z) * pitch,
        )

    def scatter_mean(self, snapshots: np.ndarray) -> np.ndarray:
        """Grid image complex64[n_det, n_z, n_x]: the mean of the channels of each cell (0 in holes)."""
        x = np.asarray(snapshots)
        if x.ndim != 2 or x.shape[1] != self.n_virt:
            raise CubecastError(
                f"snapshots: expected shape (n_det, {self.n_virt}), got {x.shape}"
            )
        m = np.zeros((self.n_virt, self.n_cells), dtype=np.complex64)
        m[np.arange(self.n_virt), self.channel_cell] = 1.0 / self.cell_counts[self.channel_cell]
        vals = x.astype(np.complex64, copy=False) @ m
        out = np.zeros((x.shape[0], self.n_z, self.n_x), dtype=np.complex64)
        out[:, self.cells[:, 0], self.cells[:, 1]] = vals
        return out

    def __repr__(self) -> str:
        return (
            f"VirtualGrid(n_virt={self.n_virt}, n_z={self.n_z}, n_x={self.n_x}, "
            f"n_cells={self.n_cells}, holes={self.n_holes}, redundant={self.n_redundant}, "
            f"pitch_m={self.pitch_m:.6g})"
        )


# --------------------------------------------------------------------------------------------
# Settings and result
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class AngleSettings:
    """Angle estimation settings (validated on construction, CubecastError on a bad value).

    fft_size_azimuth    FFT size along x (>= grid n_x, checked by AngleEstimator); default 64.
    fft_size_elevation  FFT size along z (>= grid n_z); default 16. Ignored (treated as 1) when
                        the array has a single grid row, i.e. no elevation extent.
    peak_threshold_db   a peak is kept when its FFT power is at least this many dB relative to
                        the strongest visible FFT point of the same snapshot; must be <= 0.
                        Default -10 dB: above the -13.3 dB first sidelobe of a uniform
                        rectangular aperture (common practice) with a few dB margin for noise.
    max_peaks           peaks reported per snapshot at most, strongest first; default 2.
    refine              Newton refinement on the actual element positions; default True.
    window              "rect" (default; the single-target maximum-likelihood beam), "hann"
                        (sin^2 taper without zero end weights) or "hamming"; applied separably
                        over the grid columns / rows, also inside the refinement.
    """

    fft_size_azimuth: int = 64
    fft_size_elevation: int = 16
    peak_threshold_db: float = -10.0
    max_peaks: int = 2
    refine: bool = True
    window: str = "rect"

    def __post_init__(self) -> None:
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
        if self.window not in WINDOW_NAMES:
            raise CubecastError(
                f"window must be one of {', '.join(WINDOW_NAMES)}, got {self.window!r}"
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
    """

    det_index: np.ndarray
    azimuth_deg: np.ndarray
    elevation_deg: np.ndarray
    u: np.ndarray
    w: np.ndarray
    peak_power: np.ndarray

    def __len__(self) -> int:
        return int(self.det_index.size)


# --------------------------------------------------------------------------------------------
# numba kernels
# --------------------------------------------------------------------------------------------


@njit(cache=True)
def _scatter_cells(x, weights, chan_iz, chan_ix, g):
    """g[iz, d, ix] = sum of weights[c] x[d, c] over the channels c in grid cell (iz, ix); zero
    elsewhere, including the zero padding of the rows."""
    nz, n, kx = g.shape
    for iz in range(nz):
        for d in range(n):
            for ix in range(kx):
                g[iz, d, ix] = 0
    for d in range(n):
        for c in range(x.shape[1]):
            g[chan_iz[c], d, chan_ix[c]] += weights[c] * x[d, c]


@njit(cache=True)
def _power_image(fx, dft_z, d, power, acc_re, acc_im):
    """power[kz, kx] = |sum_iz dft_z[kz, iz] * fx[iz, d, kx]|^2: the z transform of one snapshot
    whose rows are already transformed along x (fx is [n_z rows, n_det, n_fft_x]). One output row
    at a time over all columns (acc_re, acc_im: float32 scratch of n_fft_x), so the inner loops
    vectorise; float32 sums of a few rows, the power in float64."""
    n_rows = fx.shape[0]
    nz = dft_z.shape[0]
    nx = fx.shape[2]
    for iz in range(nz):
        for ix in range(nx):
            acc_re[ix] = 0.0
            acc_im[ix] = 0.0
        for r in range(n_rows):
            cr = dft_z[iz, r].real
            ci = dft_z[iz, r].imag
            row = fx[r, d]
            for ix in range(nx):
                vr = row[ix].real
                vi = row[ix].imag
                acc_re[ix] += cr * vr - ci * vi
                acc_im[ix] += cr * vi + ci * vr
        out = power[iz]
        for ix in range(nx):
            re = np.float64(acc_re[ix])
            im = np.float64(acc_im[ix])
            out[ix] = re * re + im * im


@njit(cache=True)
def _find_peaks(fx, dft_z, n_det, visible, rel_thr, max_peaks, power, acc_re, acc_im, out_det, out_iz, out_ix,
                out_pow):
    """Strongest `max_peaks` visible local maxima of the beam power per snapshot
    (8-neighbourhood, periodic; ties broken towards the lower flat index). Returns the number
    written."""
    nz = dft_z.shape[0]
    nx = fx.shape[2]
    dz_lo = -1 if nz > 1 else 0
    dz_hi = 1 if nz > 1 else 0
    dx_lo = -1 if nx > 1 else 0
    dx_hi = 1 if nx > 1 else 0
    top_p = np.empty(max_peaks, np.float64)
    top_z = np.empty(max_peaks, np.int64)
    top_x = np.empty(max_peaks, np.int64)
    count = 0
    for d in range(n_det):
        _power_image(fx, dft_z, d, power, acc_re, acc_im)
        pmax = 0.0
        for iz in range(nz):
            for ix in range(nx):
                p = power[iz, ix]
                if visible[iz, ix] and p > pmax:
                    pmax = p
        if pmax <= 0.0:
            continue
        thr = pmax * rel_thr
        n_top = 0
        for iz in range(nz):
            for ix in range(nx):
                if not visible[iz, ix]:
                    continue
                p = power[iz, ix]
                if p < thr:
                    continue
                own = iz * nx + ix
                is_max = True
                for dz in range(dz_lo, dz_hi + 1):
                    jz = (iz + dz) % nz
                    for dx in range(dx_lo, dx_hi + 1):
                        jx = (ix + dx) % nx
                        other = jz * nx + jx
                        if other == own:
                            continue
                        q = power[jz, jx]
                        if q > p or (q == p and other < own):
                            is_max = False
                            break
                    if not is_max:
                        break
                if not is_max:
                    continue
                # insert into the descending top list
                if n_top < max_peaks:
                    k = n_top
                    n_top += 1
                elif p > top_p[max_peaks - 1]:
                    k = max_peaks - 1
                else:
                    continue
                while k > 0 and top_p[k - 1] < p:
                    top_p[k] = top_p[k - 1]
                    top_z[k] = top_z[k - 1]
                    top_x[k] = top_x[k - 1]
                    k -= 1
                top_p[k] = p
                top_z[k] = iz
                top_x[k] = ix
        for k in range(n_top):
            out_det[count] = d
            out_iz[count] = top_z[k]
            out_ix[count] = top_x[k]
            out_pow[count] = top_p[k]
            count += 1
    return count


@njit(cache=True, inline="always")
def _power_derivatives(b, su, sw, suu, suw, sww):
    """|B|^2 and its gradient and Hessian in (u, w) from the beam B and its weighted sums
    (dB/du = j su, d2B/du2 = -suu, d2B/dudw = -suw, ...)."""
    cb = b.conjugate()
    p = b.real * b.real + b.imag * b.imag
    gu = -2.0 * (cb * su).imag
    gw = -2.0 * (cb * sw).imag
    huu = -2.0 * (cb * suu).real + 2.0 * (su.real * su.real + su.imag * su.imag)
    hww = -2.0 * (cb * sww).real + 2.0 * (sw.real * sw.real + sw.imag * sw.imag)
    huw = -2.0 * (cb * suw).real + 2.0 * (su.conjugate() * sw).real
    return p, gu, gw, huu, huw, hww


@njit(cache=True)
def _phasors(kx, kz, u, w, e):
    """e_i = exp(j (kx_i u + kz_i w)): the conjugate steering vector at (u, w)."""
    for i in range(kx.size):
        ph = kx[i] * u + kz[i] * w
        e[i] = complex(math.cos(ph), math.sin(ph))


@njit(cache=True)
def _beam_from_phasors(y, kx, kz, e):
    """P = |B|^2 with B = sum y_i e_i, e = _phasors(kx, kz, u, w), its gradient and Hessian in (u, w)."""
    b = 0j
    su = 0j
    sw = 0j
    suu = 0j
    suw = 0j
    sww = 0j
    for i in range(y.size):
        t = y[i] * e[i]
        b += t
        su += kx[i] * t
        sw += kz[i] * t
        suu += kx[i] * kx[i] * t
        suw += kx[i] * kz[i] * t
        sww += kz[i] * kz[i] * t
    return _power_derivatives(b, su, sw, suu, suw, sww)


@njit(cache=True)
def _axis_step(g, h, max_step):
    if h < 0.0:
        return -g / h
    if g > 0.0:
        return 0.25 * max_step
    if g < 0.0:
        return -0.25 * max_step
    return 0.0


@njit(cache=True)
def _newton_refine(y, kx, kz, u, w, e, e_try, do_u, do_w, max_du, max_dw, max_iter, trust_bins):
    """Maximise P(u, w) = |sum_i y_i exp(j (kx_i u + kz_i w))|^2 from (u, w): at most max_iter
    Newton steps with analytic derivatives, each bounded to (max_du, max_dw) (one FFT bin),
    backtracking until the power does not drop. Steps below trust_bins FFT bins in both
    coordinates are taken without the power check (where P differs from its rounding only);
    trust_bins = 0 checks every step. A result outside the visible region is pulled back onto
    the unit circle. e must hold _phasors(kx, kz, u, w) on entry and holds those of the returned
    point on exit (so a caller that refines the same point again pays no trigonometry for it);
    e_try is scratch. Returns (u, w, P)."""
    tol_u = max_du * 1e-9
    tol_w = max_dw * 1e-9
    p, gu, gw, huu, huw, hww = _beam_from_phasors(y, kx, kz, e)
    for _ in range(max_iter):
        su = 0.0
        sw = 0.0
        if do_u and do_w:
            det_h = huu * hww - huw * huw
            if huu < 0.0 and det_h > 0.0:
                su = -(hww * gu - huw * gw) / det_h
                sw = -(huu * gw - huw * gu) / det_h
            else:
                su = _axis_step(gu, huu, max_du)
                sw = _axis_step(gw, hww, max_dw)
        elif do_u:
            su = _axis_step(gu, huu, max_du)
        elif do_w:
            sw = _axis_step(gw, hww, max_dw)
        scale = 1.0
        if abs(su) > max_du:
            scale = max_du / abs(su)
        if abs(sw) * scale > max_dw:
            scale = max_dw / abs(sw)
        su *= scale
        sw *= scale
        if su == 0.0 and sw == 0.0:
            break
        accepted = False
        for _bt in range(8):
            _phasors(kx, kz, u + su, w + sw, e_try)
            p2, gu2, gw2, huu2, huw2, hww2 = _beam_from_phasors(y, kx, kz, e_try)
            if p2 >= p or (abs(su) <= trust_bins * max_du and abs(sw) <= trust_bins * max_dw):
                accepted = True
                break
            su *= 0.5
            sw *= 0.5
        if not accepted:
            break
        u += su
        w += sw
        e[:] = e_try
        p, gu, gw, huu, huw, hww = p2, gu2, gw2, huu2, huw2, hww2
        if abs(su) <= tol_u and abs(sw) <= tol_w:
            break
    r2 = u * u + w * w
    if r2 > 1.0:
        r = math.sqrt(r2)
        u /= r
        w /= r
        _phasors(kx, kz, u, w, e)
        p = _beam_from_phasors(y, kx, kz, e)[0]
    return u, w, p


@njit(cache=True)
def _refine_peaks(
    snapshots, chan_weight, kx, kz, n_found, det, u_grid, w_grid, pk_ix, pk_iz, do_u, do_w, do_refine,
    max_du, max_dw, out_keep, out_u, out_w, out_p,
):
    """Independent single-target refinement of every FFT peak (stage 5 of the module doc), seeded
    at its grid point (u_grid[pk_ix], w_grid[pk_iz])."""
    n_virt = snapshots.shape[1]
    y = np.empty(n_virt, np.complex128)
    e = np.empty(n_virt, np.complex128)
    e_try = np.empty(n_virt, np.complex128)
    first_of_det = 0
    for k in range(n_found):
        d = det[k]
        if k == 0 or det[k - 1] != d:
            first_of_det = k
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * chan_weight[i]
        u = u_grid[pk_ix[k]]
        w = w_grid[pk_iz[k]]
        if do_refine:
            _phasors(kx, kz, u, w, e)
            u, w, p = _newton_refine(y, kx, kz, u, w, e, e_try, do_u, do_w, max_du, max_dw,
                                     _MAX_NEWTON_ITERATIONS, 0.0)
        else:
            _phasors(kx, kz, u, w, e)
            p = _beam_from_phasors(y, kx, kz, e)[0]
        keep = True
        for j in range(first_of_det, k):
            if out_keep[j] and abs(out_u[j] - u) < 0.5 * max_du and abs(out_w[j] - w) < 0.5 * max_dw:
                keep = False
                break
        out_keep[k] = keep
        out_u[k] = u
        out_w[k] = w
        out_p[k] = p


@njit(cache=True)
def _joint_amplitudes(ph, act, n_act, y, gram, rhs, work, amp, vif):
    """Least-squares amplitudes of the active peaks: amp = (S^H S)^-1 S^H y, where the columns
    of S are the steering vectors conj(ph[act[a]]) (ph holds phasors, see _phasors), by a
    Cholesky factorisation G = L L^H of the Gram matrix G = S^H S. Writes amp[act[a]] and the
    variance inflation vif[act[a]] = n_virt * (G^-1)_aa: how much larger the variance of the
    joint amplitude is than that of a lone target (1 for orthogonal steering vectors, 1 / (1 -
    rho^2) for a pair with normalised correlation rho). Returns False (amp, vif untouched) when
    G is numerically singular, i.e. two active directions are indistinguishable on this array."""
    n_virt = y.size
    for a in range(n_act):
        pa = act[a]
        acc = 0j
        for i in range(n_virt):
            acc += ph[pa, i] * y[i]
        rhs[a] = acc
        for b in range(a, n_act):
            pb = act[b]
            acc = 0j
            for i in range(n_virt):
                acc += ph[pa, i] * ph[pb, i].conjugate()
            gram[a, b] = acc
            gram[b, a] = acc.conjugate()
    # Cholesky G = L L^H in the lower triangle of gram
    for a in range(n_act):
        diag = gram[a, a].real
        for c in range(a):
            diag -= gram[a, c].real ** 2 + gram[a, c].imag ** 2
        if diag <= _GRAM_RELATIVE_FLOOR * n_virt:
            return False
        lad = math.sqrt(diag)
        gram[a, a] = lad
        for b in range(a + 1, n_act):
            acc = gram[b, a]
            for c in range(a):
                acc -= gram[b, c] * gram[a, c].conjugate()
            gram[b, a] = acc / lad
    # forward (L z = rhs) and backward (L^H amp = z) substitution
    for a in range(n_act):
        acc = rhs[a]
        for c in range(a):
            acc -= gram[a, c] * rhs[c]
        rhs[a] = acc / gram[a, a].real
    for a in range(n_act - 1, -1, -1):
        acc = rhs[a]
        for c in range(a + 1, n_act):
            acc -= gram[c, a].conjugate() * rhs[c]
        rhs[a] = acc / gram[a, a].real
    for a in range(n_act):
        amp[act[a]] = rhs[a]
    # (G^-1)_aa = sum_k |(L^-1)_ka|^2; column a of L^-1 by forward substitution of L z = e_a
    for a in range(n_act):
        acc2 = 0.0
        for k in range(a, n_act):
            acc = 1.0 + 0j if k == a else 0j
            for c in range(a, k):
                acc -= gram[k, c] * work[c]
            work[k] = acc / gram[k, k].real
            acc2 += work[k].real ** 2 + work[k].imag ** 2
        vif[act[a]] = n_virt * acc2
    return True


@njit(cache=True)
def _drop_active(act, n_act, a):
    for b in range(a, n_act - 1):
        act[b] = act[b + 1]
    return n_act - 1


@njit(cache=True)
def _prune_weak(act, n_act, amp, rel_thr):
    """Drop active peaks whose joint power |amp|^2 is below rel_thr times the strongest one.
    Returns the new count (the strongest always stays)."""
    pmax = 0.0
    for a in range(n_act):
        q = amp[act[a]]
        pmax = max(pmax, q.real * q.real + q.imag * q.imag)
    a = 0
    while a < n_act:
        q = amp[act[a]]
        if q.real * q.real + q.imag * q.imag < rel_thr * pmax:
            n_act = _drop_active(act, n_act, a)
        else:
            a += 1
    return n_act


@njit(cache=True)
def _weakest_active(act, n_act, rank, vif, max_vif):
    """Position in act of the lowest-ranked peak among those with vif > max_vif (among all
    when max_vif < 0); -1 if none."""
    worst = -1
    pw = np.inf
    for a in range(n_act):
        p = act[a]
        if (max_vif < 0.0 or vif[p] > max_vif) and rank[p] < pw:
            pw = rank[p]
            worst = a
    return worst


@njit(cache=True)
def _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif, rank, rel_thr, max_vif):
    """Joint least-squares amplitudes of the active peaks, dropping peaks until the set is
    resolvable and every peak is strong enough, refitting after every drop:
    - singular Gram matrix: the lowest-ranked peak goes;
    - variance inflation above max_vif (directions the array cannot tell apart, e.g. two peaks
      that converged onto each other): the lowest-ranked of the inflated peaks goes, i.e. they
      merge into the higher-ranked one;
    - joint power |amp|^2 below rel_thr times the strongest: that peak goes.
    rank is the single-target beam power of step 5: joint amplitudes of nearly collinear
    steering vectors are unreliable (two of them with large opposite amplitudes can fit noise,
    the two-target likelihood then pulls a true peak onto a noise peak), so they do not decide
    which peak of such a set survives. Returns (n_act, dropped_any); n_act >= 1."""
    dropped = False
    while True:
        while not _joint_amplitudes(ph, act, n_act, y, gram, rhs, work, amp, vif):
            n_act = _drop_active(act, n_act, _weakest_active(act, n_act, rank, vif, -1.0))
            dropped = True
        if n_act == 1:
            return n_act, dropped
        worst = _weakest_active(act, n_act, rank, vif, max_vif)
        if worst >= 0:
            n_act = _drop_active(act, n_act, worst)
            dropped = True
            continue
        n_new = _prune_weak(act, n_act, amp, rel_thr)
        if n_new == n_act:
            return n_act, dropped
        n_act = n_new
        dropped = True


@njit(cache=True)
def _residual_cost(y, ph, act, n_act, amp):
    """||y - sum_a amp[act[a]] conj(ph[act[a]])||^2: the misfit of the joint model."""
    c = 0.0
    for i in range(y.size):
        r = y[i]
        for a in range(n_act):
            q = act[a]
            r -= amp[q] * ph[q, i].conjugate()
        c += r.real * r.real + r.imag * r.imag
    return c


@njit(cache=True)
def _damped_solve(h, g, n, lam, chol, out):
    """Solve (h + lam * diag(h)) x = g for the symmetric positive definite n x n leading block
    of h by a Cholesky factorisation in chol. Returns False if not positive definite."""
    for a in range(n):
        s = h[a, a] * (1.0 + lam)
        for c in range(a):
            s -= chol[a, c] * chol[a, c]
        if not s > 0.0:
            return False
        lad = math.sqrt(s)
        chol[a, a] = lad
        for b in range(a + 1, n):
            t = h[b, a]
            for c in range(a):
                t -= chol[b, c] * chol[a, c]
            chol[b, a] = t / lad
    for a in range(n):
        t = g[a]
        for c in range(a):
            t -= chol[a, c] * out[c]
        out[a] = t / chol[a, a]
    for a in range(n - 1, -1, -1):
        t = out[a]
        for c in range(a + 1, n):
            t -= chol[c, a] * out[c]
        out[a] = t / chol[a, a]
    return True


@njit(cache=True)
def _joint_gauss_newton(
    y, kx, kz, act, n_act, gu, gw, ph, amp, gu_try, gw_try, ph_try, amp_try, res, gram, rhs,
    work, vif, jac, hess, chol, grad, step, do_u, do_w, max_du, max_dw, max_iter, tol_bins,
):
    """Joint local refinement of all active directions: Levenberg-Marquardt iterations on
    ||y - sum_a amp_a steer(u_a, w_a)||^2 over directions and amplitudes (the direction part of
    a Gauss-Newton step of that problem is the variable-projection step; the amplitudes are
    refitted by joint least squares after every step). Steps are bounded to one FFT bin; a
    step is taken only if the misfit does not grow. On entry ph and amp hold the phasors and
    joint amplitudes at (gu, gw), on exit those of the returned point. Returns the number of
    accepted steps."""
    n_virt = y.size
    n_ang = (1 if do_u else 0) + (1 if do_w else 0)
    per = n_ang + 2
    dim = n_act * per
    cost = _residual_cost(y, ph, act, n_act, amp)
    lam = 1e-6
    n_steps = 0
    for _ in range(max_iter):
        # Jacobian of mu = sum_p amp_p conj(ph_p) and the residual y - mu
        for i in range(n_virt):
            res[i] = y[i]
        for a in range(n_act):
            p = act[a]
            c = a * per
            for i in range(n_virt):
                s = ph[p, i].conjugate()
                res[i] -= amp[p] * s
                col = c
                if do_u:
                    jac[i, col] = -1j * kx[i] * amp[p] * s
                    col += 1
                if do_w:
                    jac[i, col] = -1j * kz[i] * amp[p] * s
                    col += 1
                jac[i, col] = s
                jac[i, col + 1] = 1j * s
        for a in range(dim):
            acc = 0.0
            for i in range(n_virt):
                acc += (jac[i, a].conjugate() * res[i]).real
            grad[a] = acc
            for b in range(a + 1):
                acc = 0.0
                for i in range(n_virt):
                    acc += (jac[i, a].conjugate() * jac[i, b]).real
                hess[a, b] = acc
                hess[b, a] = acc
        accepted = False
        moved = 0.0
        for _try in range(8):
            if not _damped_solve(hess, grad, dim, lam, chol, step):
                lam *= 10.0
                continue
            big = 0.0
            for a in range(n_act):
                col = a * per
                if do_u:
                    big = max(big, abs(step[col]) / max_du)
                    col += 1
                if do_w:
                    big = max(big, abs(step[col]) / max_dw)
            scale = 1.0 / big if big > 1.0 else 1.0
            for a in range(n_act):
                p = act[a]
                col = a * per
                u = gu[p]
                w = gw[p]
                if do_u:
                    u += scale * step[col]
                    col += 1
                if do_w:
                    w += scale * step[col]
                r2 = u * u + w * w
                if r2 > 1.0:
                    r = math.sqrt(r2)
                    u /= r
                    w /= r
                gu_try[p] = u
                gw_try[p] = w
                _phasors(kx, kz, u, w, ph_try[p])
            if _joint_amplitudes(ph_try, act, n_act, y, gram, rhs, work, amp_try, vif):
                cost_try = _residual_cost(y, ph_try, act, n_act, amp_try)
                if cost_try <= cost or big * scale <= tol_bins:
                    accepted = True
                    moved = big * scale
                    cost = cost_try
                    break
            lam *= 10.0
        if not accepted:
            break
        n_steps += 1
        lam = max(lam * 0.1, 1e-12)
        for a in range(n_act):
            p = act[a]
            gu[p] = gu_try[p]
            gw[p] = gw_try[p]
            amp[p] = amp_try[p]
            for i in range(n_virt):
                ph[p, i] = ph_try[p, i]
        if moved <= tol_bins:
            break
    return n_steps


@njit(cache=True, inline="always")
def _group_end(det, n_found, k0):
    """One past the last peak of the snapshot of peak k0 (det: snapshot of each peak, grouped)."""
    k1 = k0 + 1
    while k1 < n_found and det[k1] == det[k0]:
        k1 += 1
    return k1


@njit(cache=True)
def _largest_group(det, n_found):
    """The largest number of peaks of one snapshot (det: snapshot of each peak, grouped); at least 1."""
    mp = 1
    k0 = 0
    while k0 < n_found:
        k1 = _group_end(det, n_found, k0)
        mp = max(mp, k1 - k0)
        k0 = k1
    return mp


@njit(cache=True)
def _relax_peaks(
    snapshots, cal, win, kx, kz, n_found, det, do_u, do_w, max_du, max_dw, rel_thr, max_vif,
    win_sum2, max_sweeps, move_tol, inner_iter, trust_bins, gn_iter, gn_tol, out_keep, out_u,
    out_w, out_p,
):
    """Joint refinement of every snapshot with two or more kept peaks (step 6 of the module
    doc: RELAX sweeps, then joint Gauss-Newton), in place on the output of _refine_peaks.
    Within a snapshot the kept peaks are written back first, strongest first; the others get
    keep = False."""
    n_virt = snapshots.shape[1]
    mp = _largest_group(det, n_found)
    y = np.empty(n_virt, np.complex128)
    res = np.empty(n_virt, np.complex128)
    ph = np.empty((mp, n_virt), np.complex128)  # phasors (conjugate steering) per peak
    e_try = np.empty(n_virt, np.complex128)
    amp = np.zeros(mp, np.complex128)
    gram = np.empty((mp, mp), np.complex128)
    rhs = np.empty(mp, np.complex128)
    work = np.empty(mp, np.complex128)
    vif = np.empty(mp, np.float64)
    act = np.empty(mp, np.int64)
    gu = np.empty(mp, np.float64)
    gw = np.empty(mp, np.float64)
    gp = np.empty(mp, np.float64)
    rank = np.empty(mp, np.float64)
    order = np.empty(mp, np.int64)
    # joint Gauss-Newton buffers
    n_ang = (1 if do_u else 0) + (1 if do_w else 0)
    dim_max = mp * (n_ang + 2)
    gu_try = np.empty(mp, np.float64)
    gw_try = np.empty(mp, np.float64)
    ph_try = np.empty((mp, n_virt), np.complex128)
    amp_try = np.empty(mp, np.complex128)
    jac = np.empty((n_virt, dim_max), np.complex128)
    hess = np.empty((dim_max, dim_max), np.float64)
    chol = np.empty((dim_max, dim_max), np.float64)
    grad = np.empty(dim_max, np.float64)
    step = np.empty(dim_max, np.float64)
    k0 = 0
    while k0 < n_found:
        k1 = _group_end(det, n_found, k0)
        n_act = 0
        for k in range(k0, k1):
            if out_keep[k]:
                act[n_act] = k - k0
                n_act += 1
        if n_act < 2:
            k0 = k1
            continue
        d = det[k0]
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * cal[i]
        for a in range(n_act):
            p = act[a]
            gu[p] = out_u[k0 + p]
            gw[p] = out_w[k0 + p]
            amp[p] = 0.0
            rank[p] = out_p[k0 + p]
            _phasors(kx, kz, gu[p], gw[p], ph[p])
        n_act, _ = _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif, rank, rel_thr,
                                  max_vif)
        for _round in range(_MAX_RELAX_ROUNDS):
            # RELAX sweeps: get every peak into the basin of the joint optimum
            n_sw = 0
            while n_act >= 2 and n_sw < max_sweeps:
                n_sw += 1
                move = 0.0
                n_it = _MAX_NEWTON_ITERATIONS if n_sw == 1 else inner_iter
                a = 0
                while a < n_act:
                    p = act[a]
                    # single-target refinement of p on the data minus the others' joint fits
                    for i in range(n_virt):
                        res[i] = y[i]
                    for b in range(n_act):
                        if b != a:
                            q = act[b]
                            for i in range(n_virt):
                                res[i] -= amp[q] * ph[q, i].conjugate()
                    for i in range(n_virt):
                        res[i] *= win[i]
                    u, w, _ = _newton_refine(res, kx, kz, gu[p], gw[p], ph[p], e_try, do_u,
                                             do_w, max_du, max_dw, n_it, trust_bins)
                    move = max(move, abs(u - gu[p]) / max_du, abs(w - gw[p]) / max_dw)
                    gu[p] = u
                    gw[p] = w
                    n_act, dropped = _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp,
                                                    vif, rank, rel_thr, max_vif)
                    if dropped:
                        move = np.inf  # the others were refined against a different model
                        break
                    a += 1
                if move <= move_tol:
                    break
            if n_act < 2:
                break
            # joint Gauss-Newton finish: the cyclic sweeps converge slowly for close peaks
            _joint_gauss_newton(
                y, kx, kz, act, n_act, gu, gw, ph, amp, gu_try, gw_try, ph_try, amp_try, res,
                gram, rhs, work, vif, jac, hess, chol, grad, step, do_u, do_w, max_du, max_dw,
                gn_iter, gn_tol,
            )
            n_act, dropped = _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif,
                                            rank, rel_thr, max_vif)
            if not dropped:
                break
        if n_act == 1:
            # back to one target: its single-target refinement on the whole snapshot, as for a
            # snapshot with a single FFT peak
            p = act[0]
            gu[p] = out_u[k0 + p]
            gw[p] = out_w[k0 + p]
            gp[p] = out_p[k0 + p]
        else:
            for a in range(n_act):
                p = act[a]
                gp[p] = (amp[p].real ** 2 + amp[p].imag ** 2) * win_sum2
        # write back strongest first; the dropped peaks go last with keep = False
        for a in range(n_act):
            v = act[a]
            b = a
            while b > 0 and gp[order[b - 1]] < gp[v]:
                order[b] = order[b - 1]
                b -= 1
            order[b] = v
        for k in range(k0, k1):
            out_keep[k] = False
        for a in range(n_act):
            p = order[a]
            out_keep[k0 + a] = True
            out_u[k0 + a] = gu[p]
            out_w[k0 + a] = gw[p]
            out_p[k0 + a] = gp[p]
        k0 = k1


@njit(cache=True)
def _residuals(snapshots, cal, kx, kz, n_found, det, keep, u, w, max_peaks, resid, open_slot, top_amp2):
    """Step 7 (module doc), first half. For each snapshot with at least one and fewer than max_peaks
    kept peaks (open_slot[d] = True): resid[d] = the calibrated snapshot minus the joint
    least-squares fit of its kept peaks, and top_amp2[d] = the largest |amplitude|^2 of that fit.
    Other snapshots: resid[d] = 0, open_slot[d] = False."""
    n_det, n_virt = snapshots.shape
    mp = _largest_group(det, n_found)
    y = np.empty(n_virt, np.complex128)
    ph = np.empty((mp, n_virt), np.complex128)
    act = np.empty(mp, np.int64)
    amp = np.zeros(mp, np.complex128)
    gram = np.empty((mp, mp), np.complex128)
    rhs = np.empty(mp, np.complex128)
    work = np.empty(mp, np.complex128)
    vif = np.empty(mp, np.float64)
    for d in range(n_det):
        open_slot[d] = False
        for i in range(n_virt):
            resid[d, i] = 0
    k0 = 0
    while k0 < n_found:
        k1 = _group_end(det, n_found, k0)
        n_act = 0
        for k in range(k0, k1):
            if keep[k]:
                act[n_act] = n_act
                _phasors(kx, kz, u[k], w[k], ph[n_act])
                n_act += 1
        d = det[k0]
        k0 = k1
        if n_act == 0 or n_act >= max_peaks:
            continue
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * cal[i]
        if not _joint_amplitudes(ph, act, n_act, y, gram, rhs, work, amp, vif):
            continue
        top = 0.0
        for a in range(n_act):
            top = max(top, amp[a].real ** 2 + amp[a].imag ** 2)
            for i in range(n_virt):
                y[i] -= amp[a] * ph[a, i].conjugate()
        for i in range(n_virt):
            resid[d, i] = y[i]
        open_slot[d] = True
        top_amp2[d] = top


@njit(cache=True)
def _residual_peaks(fx, dft_z, n_det, visible_f, open_slot, top_amp2, beam_gain2, rel_thr, n_cells, g_crit,
                    power, acc_re, acc_im, out_iz, out_ix):
    """Step 7, second half: for each open snapshot, the strongest visible point of its residual's
    beam image (fx: the residual's grid rows transformed along x), kept (out_iz, out_ix; -1 when
    not) when it is both
    - strong: beam power >= rel_thr * beam_gain2 * top_amp2[d], i.e. a target of at least the
      peak_threshold_db fraction of the strongest one's power;
    - one tone, not noise: Fisher's g statistic g = max beam power / (n_cells * residual energy)
      >= g_crit (Fisher, "Tests of significance in harmonic analysis", Proc. R. Soc. A, 1929);
      a lone tone gives g = 1.
    Returns the number kept."""
    nz, nx = power.shape
    n_rows = fx.shape[0]
    count = 0
    for d in range(n_det):
        out_iz[d] = -1
        out_ix[d] = -1
        if not open_slot[d]:
            continue
        energy = 0.0
        for r in range(n_rows):
            row = fx[r, d]
            for ix in range(nx):
                energy += np.float64(row[ix].real) ** 2 + np.float64(row[ix].imag) ** 2
        energy /= nx  # Parseval: the grid cells' energy
        if not energy > 0.0:
            continue
        _power_image(fx, dft_z, d, power, acc_re, acc_im)
        best, biz, bix = 0.0, -1, -1
        for iz in range(nz):
            for ix in range(nx):
                p = power[iz, ix] * visible_f[iz, ix]
                if p > best:
                    best, biz, bix = p, iz, ix
        if biz < 0 or best < rel_thr * beam_gain2 * top_amp2[d] or best < g_crit * n_cells * energy:
            continue
        out_iz[d] = biz
        out_ix[d] = bix
        count += 1
    return count


@njit(cache=True)
def _coherence(fx, dft_z, n_det, visible_f, x, calibration, n_virt, power, acc_re, acc_im, out):
    """out[d] = max over visible grid points of the beam power image / (n_virt ||x_d c||^2), float32
    (0 for an all-zero snapshot); visible_f is the visibility mask as 0.0 / 1.0, c the calibration."""
    nz, nx = power.shape
    for d in range(n_det):
        energy = 0.0
        for c in range(x.shape[1]):
            y = x[d, c] * calibration[c]
            energy += np.float64(y.real) ** 2 + np.float64(y.imag) ** 2
        norm = n_virt * energy
        _power_image(fx, dft_z, d, power, acc_re, acc_im)
        m = 0.0
        for iz in range(nz):
            for ix in range(nx):
                p = power[iz, ix] * visible_f[iz, ix]
                if p > m:
                    m = p
        out[d] = np.float32(m / norm) if norm > 0.0 else np.float32(0.0)


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


# --------------------------------------------------------------------------------------------
# Estimator
# --------------------------------------------------------------------------------------------


def _window(name: str, n: int) -> np.ndarray:
    if n == 1 or name == "rect":
        return np.ones(n)
    k = np.arange(n)
    if name == "hann":
        # sin^2 taper sampled so that no element gets weight 0 (matters for small arrays)
        return np.sin(np.pi * (k + 1) / (n + 1)) ** 2
    if name == "hamming":
        return 0.54 - 0.46 * np.cos(2.0 * np.pi * k / (n - 1))
    raise CubecastError(f"window must be one of {', '.join(WINDOW_NAMES)}, got {name!r}")


def _bin_direction_cosines(n_fft: int, wavelength_m: float, pitch_m: float) -> np.ndarray:
    k = np.arange(n_fft)
    k = np.where(k < (n_fft + 1) // 2, k, k - n_fft) if n_fft > 1 else k
    return (wavelength_m / pitch_m) * k / n_fft


class AngleEstimator:
    """Direction finding over a VirtualGrid; see the module docstring for the method.

    AngleEstimator(grid, settings=AngleSettings(), calibration=None, *, capacity=256)

    calibration: complex[n_virt] multiplied onto the channels before anything else
    (identity when None). capacity: initial number of snapshots the preallocated FFT buffers
    hold; they grow (once) when a call brings more.

    Multi-peak snapshots are refined jointly (module doc, step 6).

    Attributes: grid, settings, calibration (complex64[n_virt]), n_fft_x, n_fft_z,
    u_grid (float64[n_fft_x]), w_grid (float64[n_fft_z]), visible (bool[n_fft_z, n_fft_x]),
    bin_u, bin_w (FFT bin spacing in direction cosine).
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
        self.u_grid = _bin_direction_cosines(self.n_fft_x, lam, pitch)
        self.w_grid = _bin_direction_cosines(self.n_fft_z, lam, pitch)
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
        wx = _window(settings.window, grid.n_x)
        wz = _window(settings.window, grid.n_z)
        chan_win = wx[grid.channel_ix] * wz[grid.channel_iz]
        self._power_norm = n_virt / float(chan_win.sum()) ** 2
        self._chan_weight = (cal.astype(np.complex128) * chan_win)
        self._chan_win = chan_win.astype(np.float64)
        self._cal128 = cal.astype(np.complex128)
        self._win_sum2 = float(chan_win.sum()) ** 2
        # channel weights into the grid cells: cell means (windowed, calibrated) for the estimation
        # image; cell sums (calibrated, no window) for coherence, where the on-grid beam is a^H x
        self._w_mean = (self._chan_weight / grid.cell_counts[grid.channel_cell]).astype(np.complex64)
        # step 7: the residual is already calibrated; a unit tone's beam peak on that image is
        # (sum of cell weights)^2; Fisher's g critical value for n cells at RESIDUAL_FALSE_ALARM,
        # g_crit = 1 - (alpha / n)^(1 / (n - 1)) (the first term of Fisher's 1929 series)
        win_cells = chan_win / grid.cell_counts[grid.channel_cell]
        self._w_window = win_cells.astype(np.complex64)
        self._beam_gain2 = float(win_cells.sum()) ** 2
        n_cells = grid.n_cells
        self._g_crit = 1.0 - (RESIDUAL_FALSE_ALARM / n_cells) ** (1.0 / (n_cells - 1)) if n_cells > 1 else 2.0
        self._w_sum = cal.copy()
        self._chan_iz = grid.channel_iz.astype(np.int64)
        self._chan_ix = grid.channel_ix.astype(np.int64)

        # steering geometry for refinement: phase = kx*u + kz*w on centred actual positions
        k0 = 2.0 * np.pi / lam
        pos = grid.positions_m
        self._kx = k0 * (pos[:, 0] - pos[:, 0].mean())
        self._kz = k0 * (pos[:, 2] - pos[:, 2].mean())

        kz = np.arange(self.n_fft_z)[:, None] * np.arange(grid.n_z)[None, :]
        self._dft_z = np.exp(2j * np.pi * kz / self.n_fft_z).astype(np.complex64)
        self._power = np.empty((self.n_fft_z, self.n_fft_x), dtype=np.float64)
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
        self._top_amp2 = np.empty(capacity, dtype=np.float64)
        self._new_iz = np.empty(capacity, dtype=np.int64)
        self._new_ix = np.empty(capacity, dtype=np.int64)

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
        _scatter_cells(x, weights, self._chan_iz, self._chan_ix, g)
        return ifft_unnormalised_inplace(g, axis=2)

    def estimate(self, snapshots: np.ndarray) -> AngleResult:
        """Find and refine angle peaks; snapshots complex64[n_det, n_virt] -> AngleResult.

        Snapshots with several peaks are refined jointly (module doc, step 6)."""
        x = self._check(snapshots)
        n = x.shape[0]
        if n == 0:
            return _empty_result()
        fx = self._row_spectra(x, self._w_mean)
        n_found = _find_peaks(
            fx, self._dft_z, n, self.visible, self._rel_thr, self.settings.max_peaks, self._power,
            self._acc_re, self._acc_im, self._pk_det, self._pk_iz, self._pk_ix, self._pk_pow,
        )
        det = self._pk_det[:n_found]
        _refine_peaks(
            x, self._chan_weight, self._kx, self._kz, n_found, det, self.u_grid, self.w_grid, self._pk_ix,
            self._pk_iz,
            self._do_u, self._do_w, bool(self.settings.refine), self.bin_u, self.bin_w,
            self._pk_keep, self._pk_u, self._pk_w, self._pk_p,
        )
        keep, u, w, p = self._pk_keep, self._pk_u, self._pk_w, self._pk_p
        if self.settings.refine and self.settings.max_peaks > 1:
            self._relax(x, n_found, det, keep, u, w, p)
            n_found, det, keep, u, w, p = self._residual_search(x, n_found, det, keep, u, w, p)
        det_index = np.empty(n_found, np.int32)
        values = np.empty((5, n_found), np.float32)  # azimuth, elevation, u, w, peak power
        n_kept = _kept_peaks(n_found, keep, det, u, w, p, self._power_norm, det_index, values)
        return AngleResult(det_index=det_index[:n_kept], azimuth_deg=values[0, :n_kept],
                           elevation_deg=values[1, :n_kept], u=values[2, :n_kept], w=values[3, :n_kept],
                           peak_power=values[4, :n_kept])

    def _relax(self, x, n_found, det, keep, u, w, p):
        """Step 6 on the peak arrays, in place."""
        _relax_peaks(
            x, self._cal128, self._chan_win, self._kx, self._kz, n_found, det,
            self._do_u, self._do_w, self.bin_u, self.bin_w, self._rel_thr,
            _MAX_VARIANCE_INFLATION, self._win_sum2,
            _MAX_RELAX_SWEEPS, _RELAX_MOVE_TOL, _RELAX_NEWTON_ITERATIONS, _RELAX_TRUST_BINS,
            _MAX_JOINT_ITERATIONS, _JOINT_STEP_TOL, keep, u, w, p,
        )

    def _residual_search(self, x, n_found, det, keep, u, w, p):
        """Step 7 (module doc): a target the FFT stage did not separate shows in the residual of
        the fit. For the snapshots with a strong single-tone residual, the residual's peak joins
        their kept peaks and step 6 runs again on them. Returns the peak arrays (new ones when
        any snapshot gained a peak, with its old rows left unkept)."""
        n = x.shape[0]
        resid, open_slot, top = self._resid[:n], self._open[:n], self._top_amp2[:n]
        _residuals(x, self._cal128, self._kx, self._kz, n_found, det, keep, u, w, self.settings.max_peaks,
                   resid, open_slot, top)
        fx = self._row_spectra(resid, self._w_window)
        new_iz, new_ix = self._new_iz[:n], self._new_ix[:n]
        n_new = _residual_peaks(fx, self._dft_z, n, self._visible_f, open_slot, top, self._beam_gain2,
                                self._rel_thr, self.grid.n_cells, self._g_crit, self._power, self._acc_re,
                                self._acc_im, new_iz, new_ix)
        if n_new == 0:
            return n_found, det, keep, u, w, p
        # the gaining snapshots' kept peaks plus the new one (rank 0: in a pair the array cannot
        # separate, the new peak is the one that goes), refined jointly as a sub-batch
        keep, det = keep[:n_found].copy(), det[:n_found]
        gain = np.flatnonzero(new_iz >= 0)
        rows = [np.flatnonzero((det == d) & keep) for d in gain]
        sub_det = np.concatenate([np.full(len(r) + 1, j) for j, r in enumerate(rows)])
        sub_u = np.concatenate([np.r_[u[r], self.u_grid[new_ix[d]]] for r, d in zip(rows, gain)])
        sub_w = np.concatenate([np.r_[w[r], self.w_grid[new_iz[d]]] for r, d in zip(rows, gain)])
        sub_p = np.concatenate([np.r_[p[r], 0.0] for r in rows])
        sub_keep = np.ones(sub_det.size, np.bool_)
        sub_x = np.ascontiguousarray(x[gain])
        self._relax(sub_x, sub_det.size, sub_det, sub_keep, sub_u, sub_w, sub_p)
        for r in rows:
            keep[r] = False
        det_all = np.concatenate([det, gain[sub_det]])
        order = np.argsort(det_all, kind="stable")  # each snapshot's rows together, the new ones last
        return (det_all.size, det_all[order], np.concatenate([keep, sub_keep])[order],
                np.concatenate([u[:n_found], sub_u])[order], np.concatenate([w[:n_found], sub_w])[order],
                np.concatenate([p[:n_found], sub_p])[order])

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
        _coherence(fx, self._dft_z, n, self._visible_f, x, self.calibration, self.grid.n_virt, self._power,
                   self._acc_re, self._acc_im, out)
        return out


def _empty_result() -> AngleResult:
    f = np.empty(0, dtype=np.float32)
    return AngleResult(np.empty(0, dtype=np.int32), f, f.copy(), f.copy(), f.copy(), f.copy())
