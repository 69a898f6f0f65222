"""2D CFAR detection on the range-Doppler detection map.

Input map
---------
``power[n_range, n_doppler]`` (float32, C-contiguous). The Doppler axis is last and already
fft-shifted: column ``j`` is Doppler bin ``j - n_doppler // 2``. Every cell is the non-coherent sum of
``|X|^2`` over ``K = n_integrated`` virtual channels, so a noise-only cell is ``sigma2 * G`` with
``G ~ Gamma(K, 1)`` (sum of K unit exponentials) and ``sigma2`` the per-channel noise power. ``K = 1`` is
the plain square-law detector.

Window
------
Around the cell under test (CUT) lies a rectangle of ``2 * (guard_range + train_range) + 1`` rows by
``2 * (guard_doppler + train_doppler) + 1`` columns; the guard rectangle
``(2 * guard_range + 1) x (2 * guard_doppler + 1)`` centred on the CUT (CUT included) is removed, the rest
are the training cells. Doppler wraps around (circular). In range the window is truncated at the
map edges (only existing cells are used) and the threshold factor of each range bin is the one designed
for that bin's actual training set, so the design false-alarm probability holds at the edges too.

Noise statistic ``W`` per kind
------------------------------
* ``"ca"`` cell averaging: mean of all training cells.
* ``"os"`` ordered statistic: the ``k``-th smallest training cell, ``k = round(os_rank_fraction * N)``
  clipped to ``[1, N]``.
* ``"go"`` / ``"so"`` greatest-of / smallest-of: max / min of the two half-window means. The halves are
  split along range: the near half holds the training cells at smaller range plus the CUT-row training
  cells at negative Doppler offset; the far half holds those at larger range plus the CUT-row cells at
  positive Doppler offset. Both halves are equal in the interior. If a half is empty (only possible at a
  range edge with ``train_doppler == 0``) the statistic is the mean of the other half, and the
  threshold is the cell-averaging one for that half's size.

A cell is a threshold crossing when ``power > T * W``; ``T`` comes from :func:`threshold_factor`.

Threshold factors (all computed once, at construction)
------------------------------------------------------
``T`` is designed for unit noise from the distribution of ``W`` over ``N`` iid ``Gamma(K)`` training
cells, per range bin for its own training set: Pfa in closed form for CA and for OS with ``K = 1``,
Gauss-Legendre quadrature otherwise. Formulas and their sources: cfar_design.py.

Outputs
-------
``noise`` of a detection is the estimated mean of a noise-only cell of the map, i.e. ``K * sigma2``:
``noise = W * K / E[W | unit noise]`` (``E[W]`` computed with the same quadrature, exact for CA and for
OS with ``K = 1``). ``snr_linear = power / noise - 1`` (clipped at ``SNR_FLOOR_LINEAR``) is then an
estimate of the per-channel signal-to-noise ratio.

Per-frame cost
--------------
CA/GO/SO: O(cells) from prefix sums, independent of the window size; OS: the exact k-th smallest per
cell with a sliding sorted band (``threshold``), or, for ``detect`` with local maxima, the same
detections from an exact skip test in O(cells) and a count of the training cells at the few cells
it leaves (kernels and their costs: cfar_kernels.py). All buffers live in the
Cfar object. NaN cells give unspecified (but safe) results.

Local-maximum grouping keeps a crossing only if its cell is the largest of its 3x3 neighbourhood
(circular in Doppler, truncated in range), so one target gives one detection. Among equal cells the
first in the neighbourhood's row-major order wins: the cell must exceed its neighbours at offsets
(range -1, any Doppler) and (0, -1), and be at least as large as those at (0, +1) and (+1, any); at the
Doppler seam the offset decides (column n_doppler - 1 is the left neighbour of column 0).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import CubecastError, is_integer, is_real
from ..settings import ProcessingSettings
from .cfar_design import (CFAR_KINDS, N_INTEGRATED_MAX, PFA_MAX, PFA_MIN, noise_statistic_mean, range_bin_designs,
                          threshold_factor)
from .cfar_kernels import _extract, _os_sparse, _os_statistic, _sum_statistic, _window_sums

__all__ = [
    "CFAR_KINDS",
    "SNR_FLOOR_LINEAR",
    "PFA_MIN",
    "PFA_MAX",
    "CfarSettings",
    "CfarDetections",
    "Cfar",
    "threshold_factor",
    "noise_statistic_mean",
]

SNR_FLOOR_LINEAR = 1e-6

_KIND_CODE = {"ca": 0, "os": 1, "go": 2, "so": 3}
# OS sliding band half-width in ranks: h = _OS_BAND_SCALE * sqrt(N) (speed only, never the result)
_OS_BAND_SCALE = 1.0
# sparse OS-CFAR (speed only, never the result; see _os_sparse in cfar_kernels.py): rows per band
# sharing one level, rows per group sharing one bound, and the stride (a prime) of the band's
# subsample whose quantile is the level
_OS_BAND_ROWS = 16
_OS_GROUP_ROWS = 4
_OS_SAMPLE_STRIDE = 13

# ----------------------------------------------------------------------------------------------------
# settings
# ----------------------------------------------------------------------------------------------------

_DEFAULTS = ProcessingSettings()  # the chain is always built from these: one set of defaults


@dataclass(frozen=True)
class CfarSettings:
    """What the CFAR detector does. Window sizes count cells on EACH side of the cell under test.
    Defaults are those of the [processing] settings (ProcessingSettings.cfar_*)."""

    kind: str = _DEFAULTS.cfar_kind
    train_range: int = _DEFAULTS.cfar_train_range
    guard_range: int = _DEFAULTS.cfar_guard_range
    train_doppler: int = _DEFAULTS.cfar_train_doppler
    guard_doppler: int = _DEFAULTS.cfar_guard_doppler
    pfa: float = _DEFAULTS.cfar_pfa
    os_rank_fraction: float = _DEFAULTS.cfar_os_rank_fraction
    range_min_bin: int | None = None  # first range bin reported (inclusive); None = 0
    range_max_bin: int | None = None  # end of reported range bins (exclusive); None = n_range
    local_max: bool = True  # keep only crossings that are the maximum of their 3x3 neighbourhood

    def __post_init__(self):
        if not isinstance(self.kind, str) or self.kind not in CFAR_KINDS:
            raise CubecastError(f"cfar.kind = {self.kind!r}: must be one of {', '.join(CFAR_KINDS)}")
        for name in ("train_range", "guard_range", "train_doppler", "guard_doppler"):
            value = getattr(self, name)
            if not is_integer(value) or value < 0:
                raise CubecastError(f"cfar.{name} = {value!r}: must be an integer >= 0")
        if self.train_range + self.train_doppler < 1:
            raise CubecastError(
                f"cfar.train_range = {self.train_range}, cfar.train_doppler = {self.train_doppler}: "
                "at least one of them must be >= 1 (no training cells otherwise)")
        if not is_real(self.pfa) or not (PFA_MIN <= float(self.pfa) <= PFA_MAX):
            raise CubecastError(f"cfar.pfa = {self.pfa!r}: must be a number in [{PFA_MIN:g}, {PFA_MAX:g}]")
        if (not is_real(self.os_rank_fraction) or not math.isfinite(float(self.os_rank_fraction))
                or not (0.0 < float(self.os_rank_fraction) <= 1.0)):
            raise CubecastError(
                f"cfar.os_rank_fraction = {self.os_rank_fraction!r}: must be a number in (0, 1]")
        for name in ("range_min_bin", "range_max_bin"):
            value = getattr(self, name)
            if value is not None and (not is_integer(value) or value < 0):
                raise CubecastError(f"cfar.{name} = {value!r}: must be None or an integer >= 0")
        if (self.range_min_bin is not None and self.range_max_bin is not None
                and self.range_max_bin <= self.range_min_bin):
            raise CubecastError(
                f"cfar.range_max_bin = {self.range_max_bin}: must be greater than "
                f"cfar.range_min_bin = {self.range_min_bin}")
        if not isinstance(self.local_max, (bool, np.bool_)):
            raise CubecastError(f"cfar.local_max = {self.local_max!r}: must be true or false")


@dataclass(frozen=True)
class CfarDetections:
    """Detections of one map, one entry per detection, sorted by range bin then Doppler column.

    range_bin, doppler_bin: int32 indices into the map (doppler_bin is the fft-shifted column, Doppler
    bin number ``doppler_bin - n_doppler // 2``). power: float32 cell value. noise: float32 estimated
    mean of a noise-only cell (K * per-channel noise power). snr_linear: float32 ``power / noise - 1``
    clipped at SNR_FLOOR_LINEAR (per-channel SNR estimate).
    """

    range_bin: np.ndarray
    doppler_bin: np.ndarray
    power: np.ndarray
    noise: np.ndarray
    snr_linear: np.ndarray

    def __len__(self) -> int:
        return int(self.range_bin.shape[0])

    def copy(self) -> CfarDetections:
        return CfarDetections(self.range_bin.copy(), self.doppler_bin.copy(), self.power.copy(), self.noise.copy(),
                              self.snr_linear.copy())


# ----------------------------------------------------------------------------------------------------
# the detector
# ----------------------------------------------------------------------------------------------------

def _training_counts(s: CfarSettings, n_range: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Training cells per range bin (window truncated at the range edges): all of them, the near half
    and the far half (see the module docstring)."""
    wd = s.guard_doppler + s.train_doppler
    wr = s.guard_range + s.train_range
    width_full = 2 * wd + 1
    width_guard = 2 * s.guard_doppler + 1
    n_all = np.zeros(n_range, dtype=np.int64)
    n_near = np.zeros(n_range, dtype=np.int64)
    n_far = np.zeros(n_range, dtype=np.int64)
    for r in range(n_range):
        r0, r1 = max(r - wr, 0), min(r + wr + 1, n_range)
        g0, g1 = max(r - s.guard_range, 0), min(r + s.guard_range + 1, n_range)
        n_all[r] = (r1 - r0) * width_full - (g1 - g0) * width_guard
        n_near[r] = (r - r0) * width_full - (r - g0) * width_guard + s.train_doppler
        n_far[r] = (r1 - r - 1) * width_full - (g1 - r - 1) * width_guard + s.train_doppler
    if np.any(n_all < 1):
        bad = int(np.nonzero(n_all < 1)[0][0])
        raise CubecastError(
            f"cfar window: range bin {bad} has no training cells with n_range = {n_range}, "
            f"train_range = {s.train_range}, guard_range = {s.guard_range}, train_doppler = 0: "
            "every range bin needs at least one training cell")
    return n_all, n_near, n_far


class Cfar:
    """2D CFAR detector for one map geometry; all thresholds and buffers are prepared here."""

    def __init__(self, settings: CfarSettings, n_range: int, n_doppler: int, n_integrated: int):
        if not isinstance(settings, CfarSettings):
            raise CubecastError(f"settings = {settings!r}: must be a CfarSettings")
        for name, value in (("n_range", n_range), ("n_doppler", n_doppler)):
            if not is_integer(value) or value < 1:
                raise CubecastError(f"cfar {name} = {value!r}: must be an integer >= 1")
        if not is_integer(n_integrated) or not (1 <= n_integrated <= N_INTEGRATED_MAX):
            raise CubecastError(
                f"cfar n_integrated = {n_integrated!r}: must be an integer in [1, {N_INTEGRATED_MAX}]")
        s = settings
        n_range, n_doppler, n_integrated = int(n_range), int(n_doppler), int(n_integrated)
        wd = s.guard_doppler + s.train_doppler
        wr = s.guard_range + s.train_range
        if 2 * wd + 1 > n_doppler:
            raise CubecastError(
                f"cfar.guard_doppler + cfar.train_doppler = {wd}: the Doppler window 2*{wd}+1 = {2 * wd + 1} "
                f"cells must fit in n_doppler = {n_doppler}")
        r_lo = 0 if s.range_min_bin is None else s.range_min_bin
        r_hi = n_range if s.range_max_bin is None else s.range_max_bin
        if r_hi > n_range:
            raise CubecastError(f"cfar.range_max_bin = {r_hi}: must be <= n_range = {n_range}")
        if r_lo >= n_range:
            raise CubecastError(f"cfar.range_min_bin = {r_lo}: must be < n_range = {n_range}")

        self.settings = s
        self.n_range = n_range
        self.n_doppler = n_doppler
        self.n_integrated = n_integrated
        self._wd, self._wr = wd, wr
        self._r_lo, self._r_hi = int(r_lo), int(r_hi)
        self._kind_code = _KIND_CODE[s.kind]

        self.n_train, self.n_train_near, self.n_train_far = _training_counts(s, n_range)

        # threshold factor and noise scale per range bin (one design per distinct training set)
        factor, noise_scale, rank0, _ = range_bin_designs(
            s.kind, float(s.pfa), float(s.os_rank_fraction), n_integrated, self.n_train, self.n_train_near)
        self.factor = factor
        self.noise_scale = noise_scale
        self._factor32 = factor.astype(np.float32)[:, None]
        self._rank0 = rank0

        self._prepare_buffers()

    def _prepare_buffers(self) -> None:
        """Buffers reused every frame."""
        s, n_range, n_doppler, wd, wr = self.settings, self.n_range, self.n_doppler, self._wd, self._wr
        factor, n_integrated = self.factor, self.n_integrated
        shape = (n_range, n_doppler)
        self._stat = np.zeros(shape, dtype=np.float32)
        self._threshold = np.zeros(shape, dtype=np.float32)
        n_cells = n_range * n_doppler
        self._out_r = np.empty(n_cells, dtype=np.int32)
        self._out_d = np.empty(n_cells, dtype=np.int32)
        self._out_p = np.empty(n_cells, dtype=np.float32)
        self._out_n = np.empty(n_cells, dtype=np.float32)
        if s.kind == "os":
            n_max = int(self.n_train.max())
            self._padded = np.zeros((n_range, n_doppler + 2 * wd), dtype=np.float32)
            self._scratch = np.empty(n_max + 1, dtype=np.float32)
            self._band = np.empty(n_max + 1, dtype=np.float32)
            self._rows_full = np.zeros(2 * wr + 1, dtype=np.int64)
            self._rows_guard = np.zeros(2 * wr + 1, dtype=np.int64)
            self._prepare_sparse_os()
            self._out_snr = np.empty(n_cells, dtype=np.float32)
        else:
            self._pad = np.zeros(n_doppler + 2 * wd + 1, dtype=np.float64)
            self._dfull = np.zeros(shape, dtype=np.float64)
            self._dguard = np.zeros(shape, dtype=np.float64)
            self._dleft = np.zeros(shape, dtype=np.float64)
            self._dright = np.zeros(shape, dtype=np.float64)
            self._cfull = np.zeros((n_range + 1, n_doppler), dtype=np.float64)
            self._cguard = np.zeros((n_range + 1, n_doppler), dtype=np.float64)

    def _prepare_sparse_os(self) -> None:
        """Buffers and level quantile of the sparse OS path (_os_sparse; speed only, never the result).

        The level theta of a band is the quantile phi of a subsample of n_s of its cells. In noise of
        the band's level the group bound counts the cells below theta among M cells (the window
        rectangles of a group's rows, less their common guard cells), about Binomial(M, phi)
        whatever the noise distribution, with the sample quantile itself off by about
        sqrt(phi (1 - phi) / n_s). phi is the largest value on a 0.01 grid for which
        M phi + 4 sqrt(M phi (1 - phi)) + 3 M sqrt(phi (1 - phi) / n_s) <= k - 1 (interior design):
        then a group bound rarely exceeds k - 1 and the skip floor T theta is as high as it safely
        can be."""
        n_range, n_doppler, wd, wr = self.n_range, self.n_doppler, self._wd, self._wr
        s = self.settings
        band = min(_OS_BAND_ROWS, n_range)
        self._geometry = np.array([band, _OS_GROUP_ROWS, _OS_SAMPLE_STRIDE], dtype=np.int64)
        self._sample = np.empty(band * n_doppler // _OS_SAMPLE_STRIDE + 1, dtype=np.float32)
        self._prefix = np.zeros((band + 2 * wr + 1, n_doppler), dtype=np.int32)
        self._acc = np.zeros(n_doppler, dtype=np.int32)
        self._col_full = np.zeros(n_doppler + 2 * wd, dtype=np.int32)
        self._col_guard = np.zeros(n_doppler + 2 * wd, dtype=np.int32)
        self._box_full = np.zeros(n_doppler + 2 * wd + 1, dtype=np.int32)
        self._box_guard = np.zeros(n_doppler + 2 * wd + 1, dtype=np.int32)
        self._bound = np.zeros((2, n_doppler), dtype=np.int32)
        self._flags = np.zeros(-(-n_doppler // 8) * 8, dtype=np.uint8)
        group = min(_OS_GROUP_ROWS, n_range)
        common_guard = max(2 * s.guard_range + 2 - group, 0) * (2 * s.guard_doppler + 1)
        m = min(2 * wr + group, n_range) * (2 * wd + 1) - common_guard
        k = int(self._rank0[int(np.argmax(self.n_train))]) + 1
        n_s = max(band * n_doppler // _OS_SAMPLE_STRIDE, 1)
        phi = np.arange(0.01, 1.0, 0.01)
        spread = np.sqrt(phi * (1.0 - phi))
        ok = m * phi + 4.0 * np.sqrt(m) * spread + 3.0 * m * spread / math.sqrt(n_s) <= k - 1
        self._level_fraction = float(phi[ok][-1]) if np.any(ok) else 0.01

    # ------------------------------------------------------------------------------------------------
    def _check_map(self, power) -> None:
        if not isinstance(power, np.ndarray) or power.dtype != np.float32:
            raise CubecastError(f"cfar power map dtype = {getattr(power, 'dtype', type(power))}: must be float32")
        if power.shape != (self.n_range, self.n_doppler):
            raise CubecastError(
                f"cfar power map shape = {power.shape}: must be (n_range, n_doppler) = "
                f"{(self.n_range, self.n_doppler)}")
        if not power.flags.c_contiguous:
            raise CubecastError("cfar power map: must be C-contiguous")

    def _compute_statistic(self, power: np.ndarray) -> None:
        s = self.settings
        if self._kind_code == 1:
            _os_statistic(power, self._padded, self._wr, s.guard_range, self._wd, s.guard_doppler,
                          s.train_doppler, self._rank0, self._scratch, self._band, self._rows_full,
                          self._rows_guard, self._stat, _OS_BAND_SCALE)
        else:
            _window_sums(power, self._wd, s.guard_doppler, self._pad, self._dfull, self._dguard,
                         self._dleft, self._dright, self._cfull, self._cguard)
            _sum_statistic(self._kind_code, self.n_range, self.n_doppler, self._wr, s.guard_range,
                           self._dleft, self._dright, self._cfull, self._cguard,
                           self.n_train, self.n_train_near, self.n_train_far, self._stat)

    def threshold(self, power: np.ndarray) -> np.ndarray:
        """Per-cell detection threshold T * W (float32). The array is reused by the next call."""
        self._check_map(power)
        self._compute_statistic(power)
        np.multiply(self._stat, self._factor32, out=self._threshold)
        return self._threshold

    def detect(self, power: np.ndarray, copy: bool = True) -> CfarDetections:
        """Detections of one map (see CfarDetections). The returned arrays are owned by the caller,
        or with copy=False views of the detector's buffers, valid until its next call."""
        self._check_map(power)
        s = self.settings
        if self._kind_code == 1 and s.local_max:
            # Sparse OS: the full test (local maximum, count of the training cells below p / T) only at
            # cells that an exact bound does not rule out (_os_sparse): the same detections as the full
            # OS-CFAR on any map.
            count = _os_sparse(power, self._wr, s.guard_range, self._wd, s.guard_doppler, s.train_doppler, self._rank0,
                               self._scratch, self._r_lo, self._r_hi, self.factor, self.noise_scale, SNR_FLOOR_LINEAR,
                               self._geometry, self._level_fraction, self._sample, self._prefix, self._acc,
                               self._col_full, self._col_guard, self._box_full, self._box_guard, self._bound,
                               self._flags, self._out_r, self._out_d, self._out_p, self._out_n, self._out_snr)
            det = CfarDetections(range_bin=self._out_r[:count], doppler_bin=self._out_d[:count],
                                 power=self._out_p[:count], noise=self._out_n[:count],
                                 snr_linear=self._out_snr[:count])
            return det.copy() if copy else det
        self._compute_statistic(power)
        count = _extract(power, self._stat, self.factor, self.noise_scale, self._r_lo, self._r_hi,
                         bool(s.local_max), self._out_r, self._out_d, self._out_p, self._out_n)
        p = self._out_p[:count].copy()
        noise = self._out_n[:count].copy()
        with np.errstate(divide="ignore", invalid="ignore"):
            snr = p / noise - np.float32(1.0)
        snr = np.nan_to_num(snr, nan=SNR_FLOOR_LINEAR, posinf=np.finfo(np.float32).max)
        np.maximum(snr, np.float32(SNR_FLOOR_LINEAR), out=snr)
        return CfarDetections(
            range_bin=self._out_r[:count].copy(),
            doppler_bin=self._out_d[:count].copy(),
            power=p,
            noise=noise,
            snr_linear=snr.astype(np.float32, copy=False),
        )
