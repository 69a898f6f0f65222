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
Unit noise is assumed (``sigma2 = 1``): CUT ``X ~ Gamma(K)``, training cells iid ``Gamma(K)``, and
``Pfa(T) = P(X > T W) = E_W[Q(K, T W)]`` with ``Q`` the regularised upper incomplete gamma function.

* CA: the training sum is ``Gamma(N K)``; with ``t = T / N``
  ``Pfa = sum_{i=0}^{K-1} C(NK+i-1, i) t^i / (1+t)^(NK+i)`` (equivalently ``X / W ~ F(2K, 2NK)``), for
  ``K = 1`` this is ``(1 + T/N)^-N`` whose inverse is ``T = N (Pfa^(-1/N) - 1)``.
* OS with ``K = 1``: ``Pfa = prod_{i=0}^{k-1} (N - i) / (N - i + T)`` (the product form of
  ``k C(N,k) Gamma(k) Gamma(T+N-k+1) / Gamma(T+N+1)``).
* OS with ``K > 1``, GO and SO: ``Pfa(T) = integral f_W(w) Q(K, T w) dw`` evaluated by composite
  Gauss-Legendre quadrature (16 nodes per panel) in ``s = ln w`` on the interval where
  ``ln(w f_W(w))`` is within 75 nepers of its maximum. The number of panels is doubled until the
  solved ``T`` changes by less than 1e-9 relative and the density integrates to 1 within 1e-9. ``f_W``
  is the order-statistic density resp. the density of max/min of two independent scaled
  ``Gamma(n_half K)`` means, built from log-space incomplete gamma functions (series / continued
  fraction). ``T`` is found by bisection on ``ln T``; ``Pfa(T)`` is decreasing in ``T`` for every node.

Outputs
-------
``noise`` of a detection is the estimated mean of a noise-only cell of the map, i.e. ``K * sigma2``:
``noise = W * K / E[W | unit noise]`` (``E[W]`` computed with the same quadrature, exact for CA and for
OS with ``K = 1``). ``snr_linear = power / noise - 1`` (clipped at ``SNR_FLOOR_LINEAR``) is then an
estimate of the per-channel signal-to-noise ratio.

Per-frame cost
--------------
CA/GO/SO: circular Doppler box sums per row from float64 prefix sums, then float64 prefix sums down
the range axis (O(cells), independent of the window size). OS: exact k-th smallest per cell; along a
row a sorted band of the window's values around the wanted rank is updated as the window slides and
the full window is only gathered and selected (Hoare selection) when the rank leaves the band. All
buffers live in the Cfar object. NaN cells give unspecified (but safe) results.

Local-maximum grouping keeps a crossing only if its cell is the largest of its 3x3 neighbourhood
(circular in Doppler, truncated in range; among equal cells the first in row-major order wins), so one
target gives one detection.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..errors import CubecastError, is_integer, is_real
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

CFAR_KINDS = ("ca", "os", "go", "so")
SNR_FLOOR_LINEAR = 1e-6
PFA_MIN = 1e-15
PFA_MAX = 0.5
N_INTEGRATED_MAX = 4096

_KIND_CODE = {"ca": 0, "os": 1, "go": 2, "so": 3}
# OS sliding band half-width in ranks: h = _OS_BAND_SCALE * sqrt(N) (speed only, never the result)
_OS_BAND_SCALE = 1.0
# sparse OS-CFAR floor: 70 % of the threshold a cell in receiver noise would face; map subsample
# stride for the median (a prime, so the subsample visits every Doppler column; a 256 x 128 map gives
# about a thousand cells, whose median is within a few per cent of the map's)
OS_FLOOR_FRACTION = 0.7
_OS_FLOOR_STRIDE = 31


# ----------------------------------------------------------------------------------------------------
# settings
# ----------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class CfarSettings:
    """What the CFAR detector does. Window sizes count cells on EACH side of the cell under test."""

    kind: str = "ca"
    train_range: int = 8
    guard_range: int = 2
    train_doppler: int = 4
    guard_doppler: int = 1
    pfa: float = 1e-4
    os_rank_fraction: float = 0.75
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
# incomplete gamma in log space (numpy, start-up only)
# ----------------------------------------------------------------------------------------------------

_FPMIN = 1e-300


def _log_gamma_pq(a: float, x) -> tuple[np.ndarray, np.ndarray]:
    """ln P(a, x) and ln Q(a, x) (regularised lower / upper incomplete gamma), accurate in both tails.

    Series for x < a + 1, modified Lentz continued fraction otherwise; the complement through log1p.
    """
    x = np.asarray(x, dtype=np.float64)
    flat = x.ravel()
    log_p = np.empty_like(flat)
    log_q = np.empty_like(flat)
    lg_a = math.lgamma(a)
    zero = flat <= 0.0
    log_p[zero] = -np.inf
    log_q[zero] = 0.0
    ser = (~zero) & (flat < a + 1.0)
    if np.any(ser):
        xs = flat[ser]
        term = np.full_like(xs, 1.0 / a)
        total = term.copy()
        ap = a
        for it in range(100000):
            ap += 1.0
            term *= xs / ap
            total += term
            if it % 8 == 7 and np.all(term <= total * 1e-17):  # checked every 8 terms: extra terms are free
                break
        lp = np.log(total) - xs + a * np.log(xs) - lg_a
        log_p[ser] = lp
        log_q[ser] = np.log1p(-np.exp(lp))
    cf = (~zero) & (~ser)
    if np.any(cf):
        xc = flat[cf]
        b = xc + 1.0 - a
        c = np.full_like(xc, 1.0 / _FPMIN)
        d = 1.0 / b
        h = d.copy()
        for i in range(1, 100000):
            an = -i * (i - a)
            b = b + 2.0
            d = an * d + b
            d[np.abs(d) < _FPMIN] = _FPMIN
            c = b + an / c
            c[np.abs(c) < _FPMIN] = _FPMIN
            d = 1.0 / d
            delta = d * c
            h *= delta
            if i % 8 == 0 and np.all(np.abs(delta - 1.0) < 1e-15):
                break
        lq = np.log(h) - xc + a * np.log(xc) - lg_a
        log_q[cf] = lq
        log_p[cf] = np.log1p(-np.exp(lq))
    return log_p.reshape(x.shape), log_q.reshape(x.shape)


def _logsumexp(v: np.ndarray) -> float:
    m = float(np.max(v))
    if not math.isfinite(m):
        return m
    return m + math.log(float(np.sum(np.exp(v - m))))


def _log_comb(n: int, k: int) -> float:
    return math.lgamma(n + 1) - math.lgamma(k + 1) - math.lgamma(n - k + 1)


# ----------------------------------------------------------------------------------------------------
# closed forms
# ----------------------------------------------------------------------------------------------------

def _ca_log_pfa(t_factor: float, n_train: int, k_int: int) -> float:
    """ln Pfa of CA-CFAR: sum_{i<K} C(NK+i-1, i) t^i / (1+t)^(NK+i), t = T / N."""
    t = t_factor / n_train
    m = n_train * k_int
    i = np.arange(k_int, dtype=np.float64)
    lg = np.array([math.lgamma(m + ii) for ii in range(k_int)]) - math.lgamma(m) - np.array(
        [math.lgamma(ii + 1.0) for ii in range(k_int)])
    terms = lg + i * math.log(t) - (m + i) * math.log1p(t)
    return _logsumexp(terms)


def _os1_log_pfa(t_factor: float, n_train: int, rank: int) -> float:
    """ln Pfa of OS-CFAR for K = 1: prod_{i=0}^{k-1} (N - i) / (N - i + T)."""
    i = np.arange(rank, dtype=np.float64)
    return float(np.sum(np.log(n_train - i) - np.log(n_train - i + t_factor)))


def _solve_log_t(log_pfa_fn, pfa: float, hint: float | None = None) -> float:
    """T with log_pfa_fn(T) = ln pfa (log_pfa_fn decreasing in T): bracket on ln T, then the
    Illinois variant of regula falsi (Dowell and Jarratt, BIT, 1971), superlinear where bisection
    is linear, to 1e-14 in ln T; a bisection step whenever the bracket does not halve."""
    target = math.log(pfa)

    def f(s: float) -> float:
        return log_pfa_fn(math.exp(s)) - target

    # bracket: around the hint (a previous solution) when given, widening the step each time
    centre, step = (math.log(hint), 1e-3) if hint else (0.0, 2.0)
    lo, hi = centre - step, centre + step
    f_lo = f(lo)
    s_lo = step
    while f_lo < 0.0:
        lo -= s_lo
        s_lo = min(2.0 * s_lo, 2.0)
        if lo < -700:
            raise RuntimeError("cfar threshold bracket failed (low side)")
        f_lo = f(lo)
    f_hi = f(hi)
    s_hi = step
    while f_hi > 0.0:
        hi += s_hi
        s_hi = min(2.0 * s_hi, 2.0)
        if hi > 700:
            raise RuntimeError("cfar threshold bracket failed (high side)")
        f_hi = f(hi)
    side = 0
    for _ in range(200):
        width = hi - lo
        if width < 1e-14:
            break
        mid = (lo * f_hi - hi * f_lo) / (f_hi - f_lo) if f_hi != f_lo else 0.5 * (lo + hi)
        if not lo < mid < hi:
            mid = 0.5 * (lo + hi)
        f_mid = f(mid)
        if f_mid == 0.0:
            return math.exp(mid)
        if f_mid > 0.0:  # the root is above mid
            lo, f_lo = mid, f_mid
            if side == 1:
                f_hi *= 0.5
            side = 1
        else:
            hi, f_hi = mid, f_mid
            if side == -1:
                f_lo *= 0.5
            side = -1
        if hi - lo > 0.5 * width:  # slow progress: bisect once
            m2 = 0.5 * (lo + hi)
            f_m2 = f(m2)
            if f_m2 > 0.0:
                lo, f_lo = m2, f_m2
            else:
                hi, f_hi = m2, f_m2
            side = 0
    return math.exp(0.5 * (lo + hi))


# ----------------------------------------------------------------------------------------------------
# numerical integration over the statistic's distribution
# ----------------------------------------------------------------------------------------------------

_GL_X, _GL_W = np.polynomial.legendre.leggauss(16)


def _stat_log_density(kind: str, s: np.ndarray, k_int: int, n_train: int, rank: int,
                      n_near: int) -> np.ndarray:
    """h(s) = ln(w f_W(w)) at w = exp(s), unit per-channel noise."""
    w = np.exp(s)
    if kind == "os":
        log_f_cdf, log_f_sf = _log_gamma_pq(float(k_int), w)
        h = (math.log(rank) + _log_comb(n_train, rank) + (k_int - 1) * s - w - math.lgamma(k_int) + s)
        if rank > 1:
            h = h + (rank - 1) * log_f_cdf
        if n_train > rank:
            h = h + (n_train - rank) * log_f_sf
        return h
    if kind in ("go", "so"):
        n1, n2 = n_near, n_train - n_near
        a1, a2 = float(n1 * k_int), float(n2 * k_int)
        lp1, lq1 = _log_gamma_pq(a1, n1 * w)
        lp2, lq2 = _log_gamma_pq(a2, n2 * w)
        lf1 = math.log(n1) + (a1 - 1.0) * (math.log(n1) + s) - n1 * w - math.lgamma(a1)
        lf2 = math.log(n2) + (a2 - 1.0) * (math.log(n2) + s) - n2 * w - math.lgamma(a2)
        if kind == "go":
            lf = np.logaddexp(lf1 + lp2, lf2 + lp1)
        else:
            lf = np.logaddexp(lf1 + lq2, lf2 + lq1)
        return lf + s
    if kind == "ca":  # used only to cross-check the quadrature against the closed form
        a = float(n_train * k_int)
        return math.log(n_train) + (a - 1.0) * (math.log(n_train) + s) - n_train * w - math.lgamma(a) + s
    raise ValueError(kind)


def _quadrature_design(kind: str, n_train: int, pfa: float, k_int: int, rank: int,
                       n_near: int) -> tuple[float, float]:
    """(T, E[W]) by quadrature over ln w; see the module docstring."""
    s_c = math.log(k_int)
    step = 0.02
    coarse = np.arange(s_c - 240.0, s_c + 8.0, step)
    h = _stat_log_density(kind, coarse, k_int, n_train, rank, n_near)
    h_max = float(np.max(h))
    keep = np.nonzero(h > h_max - 75.0)[0]
    s_lo = coarse[max(keep[0] - 1, 0)]
    s_hi = coarse[min(keep[-1] + 1, coarse.size - 1)]
    k_float = float(k_int)

    prev_t = None
    n_panels = 32
    for _ in range(12):
        edges = np.linspace(s_lo, s_hi, n_panels + 1)
        half = 0.5 * (edges[1:] - edges[:-1])
        mid = 0.5 * (edges[1:] + edges[:-1])
        nodes = (mid[:, None] + half[:, None] * _GL_X[None, :]).ravel()
        log_wq = np.log((half[:, None] * _GL_W[None, :]).ravel())
        hn = _stat_log_density(kind, nodes, k_int, n_train, rank, n_near) + log_wq
        norm = math.exp(_logsumexp(hn))
        w_nodes = np.exp(nodes)

        def log_pfa(t_factor, hn=hn, w_nodes=w_nodes):
            return _logsumexp(hn + _log_gamma_pq(k_float, t_factor * w_nodes)[1])

        t = _solve_log_t(log_pfa, pfa, prev_t)
        if prev_t is not None and abs(t - prev_t) <= 1e-9 * t and abs(norm - 1.0) < 1e-9:
            mean = math.exp(_logsumexp(hn + nodes))
            return t, mean
        prev_t = t
        n_panels *= 2
    raise RuntimeError(f"cfar quadrature did not converge for kind={kind}, N={n_train}, K={k_int}")


# ----------------------------------------------------------------------------------------------------
# public design functions
# ----------------------------------------------------------------------------------------------------

def _check_design_args(kind, n_train, pfa, n_integrated, os_rank, n_near):
    if not isinstance(kind, str) or kind not in CFAR_KINDS:
        raise CubecastError(f"kind = {kind!r}: must be one of {', '.join(CFAR_KINDS)}")
    if not is_integer(n_train) or n_train < 1:
        raise CubecastError(f"n_train = {n_train!r}: must be an integer >= 1")
    if not is_real(pfa) or not (PFA_MIN <= float(pfa) <= PFA_MAX):
        raise CubecastError(f"pfa = {pfa!r}: must be a number in [{PFA_MIN:g}, {PFA_MAX:g}]")
    if not is_integer(n_integrated) or not (1 <= n_integrated <= N_INTEGRATED_MAX):
        raise CubecastError(f"n_integrated = {n_integrated!r}: must be an integer in [1, {N_INTEGRATED_MAX}]")
    if os_rank is not None and (not is_integer(os_rank) or not (1 <= os_rank <= n_train)):
        raise CubecastError(f"os_rank = {os_rank!r}: must be an integer in [1, n_train = {n_train}]")
    if n_near is not None and (not is_integer(n_near) or not (0 <= n_near <= n_train)):
        raise CubecastError(f"n_near = {n_near!r}: must be an integer in [0, n_train = {n_train}]")


def _default_rank(n_train: int, fraction: float) -> int:
    return int(min(max(int(round(fraction * n_train)), 1), n_train))


@lru_cache(maxsize=4096)
def _design(kind: str, n_train: int, pfa: float, k_int: int, rank: int, n_near: int) -> tuple[float, float]:
    """(threshold factor T, E[W] for unit per-channel noise). Arguments already normalised."""
    if kind in ("go", "so") and (n_near == 0 or n_near == n_train):
        # one half is empty: the statistic is the mean of the other half (cell averaging)
        kind = "ca"
    if kind == "ca":
        t = _solve_log_t(lambda tf: _ca_log_pfa(tf, n_train, k_int), pfa)
        return t, float(k_int)
    if kind == "os" and k_int == 1:
        t = _solve_log_t(lambda tf: _os1_log_pfa(tf, n_train, rank), pfa)
        # mean of the k-th smallest of N unit exponentials: sum_{i=0}^{k-1} 1 / (N - i)
        return t, float(sum(1.0 / (n_train - i) for i in range(rank)))
    return _quadrature_design(kind, n_train, pfa, k_int, rank, n_near)


def _normalise(kind, n_train, pfa, n_integrated, os_rank, n_near):
    _check_design_args(kind, n_train, pfa, n_integrated, os_rank, n_near)
    rank = 0
    if kind == "os":
        rank = int(os_rank) if os_rank is not None else _default_rank(int(n_train), 0.75)
    near = 0
    if kind in ("go", "so"):
        near = int(n_near) if n_near is not None else int(n_train) // 2
    return kind, int(n_train), float(pfa), int(n_integrated), rank, near


def threshold_factor(kind: str, n_train: int, pfa: float, n_integrated: int, os_rank: int | None = None,
                     *, n_near: int | None = None) -> float:
    """Multiplier T such that ``power > T * W`` has false-alarm probability ``pfa`` per cell.

    ``W`` is the noise statistic of ``kind`` over ``n_train`` iid Gamma(n_integrated) training cells:
    CA mean, OS ``os_rank``-th smallest (1-based; default round(0.75 n_train)), GO/SO max/min of the
    near-half mean (``n_near`` cells, default n_train // 2) and far-half mean (the rest).
    """
    return _design(*_normalise(kind, n_train, pfa, n_integrated, os_rank, n_near))[0]


def noise_statistic_mean(kind: str, n_train: int, n_integrated: int, os_rank: int | None = None,
                         *, n_near: int | None = None) -> float:
    """E[W] for unit per-channel noise (a noise-only cell then has mean n_integrated)."""
    args = _normalise(kind, n_train, 1e-3, n_integrated, os_rank, n_near)
    return _design(*args)[1]


# ----------------------------------------------------------------------------------------------------
# the detector
# ----------------------------------------------------------------------------------------------------

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

        # training-cell counts per range bin (window truncated at the range edges)
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
        self.n_train = n_all.copy()
        self.n_train_near = n_near.copy()
        self.n_train_far = n_far.copy()

        # threshold factor and noise scale per range bin (one design per distinct training set)
        factor = np.empty(n_range, dtype=np.float64)
        noise_scale = np.empty(n_range, dtype=np.float64)
        rank0 = np.zeros(n_range, dtype=np.int64)
        mean_w_all = np.empty(n_range, dtype=np.float64)
        for r in range(n_range):
            n = int(n_all[r])
            rank = _default_rank(n, float(s.os_rank_fraction)) if s.kind == "os" else 0
            near = int(n_near[r]) if s.kind in ("go", "so") else 0
            t, mean_w = _design(s.kind, n, float(s.pfa), n_integrated, rank, near)
            factor[r] = t
            noise_scale[r] = n_integrated / mean_w
            mean_w_all[r] = mean_w
            rank0[r] = max(rank - 1, 0)
        self.factor = factor
        self.noise_scale = noise_scale
        self._factor32 = factor.astype(np.float32)[:, None]
        self._rank0 = rank0

        # buffers reused every frame
        shape = (n_range, n_doppler)
        self._stat = np.zeros(shape, dtype=np.float32)
        self._threshold = np.zeros(shape, dtype=np.float32)
        n_cells = n_range * n_doppler
        self._out_r = np.empty(n_cells, dtype=np.int32)
        self._out_d = np.empty(n_cells, dtype=np.int32)
        self._out_p = np.empty(n_cells, dtype=np.float32)
        self._out_n = np.empty(n_cells, dtype=np.float32)
        if s.kind == "os":
            n_max = int(n_all.max())
            self._padded = np.zeros((n_range, n_doppler + 2 * wd), dtype=np.float32)
            self._scratch = np.empty(n_max + 1, dtype=np.float32)
            self._band = np.empty(n_max + 1, dtype=np.float32)
            self._rows_full = np.zeros(2 * wr + 1, dtype=np.int64)
            self._rows_guard = np.zeros(2 * wr + 1, dtype=np.int64)
            self._sub = np.empty(n_cells // _OS_FLOOR_STRIDE + 1, dtype=np.float32)
            self._factor_min = float(factor.min())
            # the OS statistic of unit noise relative to the median of a Gamma(K) cell (~ its mean)
            self._median_to_stat = float(np.min(mean_w_all)) / max(n_integrated - 1.0 / 3.0, 0.5)
            self._floor_scale = OS_FLOOR_FRACTION * self._factor_min * self._median_to_stat
            self._out_snr = np.empty(n_cells, dtype=np.float32)
            self._cand = np.empty(n_cells, dtype=np.int64)
        else:
            self._pad = np.zeros(n_doppler + 2 * wd + 1, dtype=np.float64)
            self._dfull = np.zeros(shape, dtype=np.float64)
            self._dguard = np.zeros(shape, dtype=np.float64)
            self._dleft = np.zeros(shape, dtype=np.float64)
            self._dright = np.zeros(shape, dtype=np.float64)
            self._cfull = np.zeros((n_range + 1, n_doppler), dtype=np.float64)
            self._cguard = np.zeros((n_range + 1, n_doppler), dtype=np.float64)

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
            # Sparse OS: the ordered statistic only at local maxima above a floor. A cell below
            # OS_FLOOR_FRACTION * min(T) * (median of a map subsample) could only be detected where
            # the local statistic is under OS_FLOOR_FRACTION of the map's median, i.e. never in
            # receiver noise; everywhere else the result equals the full OS-CFAR.
            count = _os_sparse(power, _OS_FLOOR_STRIDE, self._floor_scale, self._sub, self._cand, self._wr,
                               s.guard_range, self._wd, s.guard_doppler, s.train_doppler, self._rank0, self._scratch,
                               self._r_lo, self._r_hi, self.factor, self.noise_scale, SNR_FLOOR_LINEAR,
                               self._out_r, self._out_d, self._out_p, self._out_n, self._out_snr)
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
