"""The virtual array as a grid: every channel of a planar MIMO virtual array (positions in the x-z
plane of the sensor frame, x right, z up) belongs to one (iz, ix) cell of a regular grid of pitch
`pitch_m` (default lambda / 2). Uniform, sparse, hole-ridden and redundant layouts all map; an
element more than 1 % of the pitch off the grid or out of the plane is an error that names it.

The grid is what the angle FFT transforms (angle_peaks.py); the refinement works on the actual
positions. The taper over the grid (`grid_window`) is separable over columns and rows.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import CubecastError, is_real

__all__ = ["VirtualGrid", "GRID_WINDOW_NAMES", "grid_window"]

GRID_WINDOW_NAMES = ("rect", "hann", "hamming")  # tapers over the grid columns / rows

_OFF_GRID_FRACTION = 0.01  # an element may sit at most 1 % of the pitch off its grid cell


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


def grid_window(name: str, n: int) -> np.ndarray:
    """Taper weights (float64[n]) over n grid columns or rows; all ones for one of them."""
    if n == 1 or name == "rect":
        return np.ones(n)
    k = np.arange(n)
    if name == "hann":
        # sin^2 taper sampled so that no element gets weight 0 (matters for small arrays)
        return np.sin(np.pi * (k + 1) / (n + 1)) ** 2
    if name == "hamming":
        return 0.54 - 0.46 * np.cos(2.0 * np.pi * k / (n - 1))
    raise CubecastError(f"window must be one of {', '.join(GRID_WINDOW_NAMES)}, got {name!r}")
