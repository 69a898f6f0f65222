"""Threshold design of the 2D CFAR detector: false-alarm probabilities and threshold factors for CA / OS /
GO / SO over K integrated channels. Start-up only; the per-frame work is in cfar.py and cfar_kernels.py.

Unit noise is assumed (``sigma2 = 1``): the cell under test is ``X ~ Gamma(K)``, the ``N`` training cells
are iid ``Gamma(K)`` (square-law detection of K channels of complex Gaussian noise, common practice),
and ``Pfa(T) = P(X > T W) = E_W[Q(K, T W)]`` with ``Q`` the regularised upper incomplete gamma function
(``scipy.special.gammaincc``) and ``W`` the noise statistic.

* CA (Finn and Johnson, "Adaptive detection mode with threshold control as a function of spatially
  sampled clutter-level estimates", RCA Review, 1968): the training sum is ``Gamma(N K)``; with
  ``t = T / N``, ``Pfa = sum_{i=0}^{K-1} C(NK+i-1, i) t^i / (1+t)^(NK+i)`` (equivalently
  ``X / W ~ F(2K, 2NK)``); for ``K = 1`` this is ``(1 + T/N)^-N``, whose inverse is
  ``T = N (Pfa^(-1/N) - 1)`` (Richards, "Fundamentals of Radar Signal Processing", 2005, ch. 7).
* OS with ``K = 1`` (Rohling, "Radar CFAR thresholding in clutter and multiple target situations",
  IEEE Trans. AES, 1983): ``Pfa = k C(N,k) Gamma(k) Gamma(T+N-k+1) / Gamma(T+N+1)``, evaluated in its
  product form ``prod_{i=0}^{k-1} (N - i) / (N - i + T)``; ``E[W] = sum_{i=0}^{k-1} 1 / (N - i)``
  (Renyi, "On the theory of order statistics", 1953: exponential spacings).
* OS with ``K > 1``, GO (Hansen and Sawyers, "Detectability loss due to greatest of selection in a
  cell-averaging CFAR", IEEE Trans. AES, 1980) and SO (Trunk, "Range resolution of targets using
  automatic detectors", IEEE Trans. AES, 1978); analysis as in Gandhi and Kassam, "Analysis of CFAR
  processors in homogeneous background", IEEE Trans. AES, 1988: ``Pfa(T) = integral f_W(w) Q(K, T w) dw``
  by composite Gauss-Legendre quadrature (16 nodes per panel) in ``s = ln w`` on the interval where
  ``ln(w f_W(w))`` is within 75 nepers of its maximum. The number of panels is doubled until the solved
  ``T`` changes by less than 1e-9 relative and the density integrates to 1 within 1e-9. ``f_W`` is the
  order-statistic density ``k C(N,k) F^(k-1) (1-F)^(N-k) f`` of ``Gamma(K)`` cells (David and Nagaraja,
  "Order Statistics", 2003) resp. the density of the max / min of two independent scaled
  ``Gamma(n_half K)`` means, built from the logarithms of ``scipy.special.gammainc`` / ``gammaincc``
  (where they underflow the density is far outside the 75-neper interval).

``T`` is the root of ``ln Pfa(e^s) = ln pfa`` in ``s = ln T`` (``Pfa`` decreases in ``T`` at every node):
a bracket, then Brent's method (``scipy.optimize.brentq``; Brent, "Algorithms for Minimization without
Derivatives", 1973) to 1e-14 in ``ln T``. Each design is cached: a Cfar solves one per distinct
training set (a few near the range edges, one for the interior).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy import optimize, special

from ..errors import CubecastError, is_integer, is_real
from ..settings import CFAR_KINDS

__all__ = [
    "CFAR_KINDS",
    "PFA_MIN",
    "PFA_MAX",
    "N_INTEGRATED_MAX",
    "threshold_factor",
    "noise_statistic_mean",
    "default_rank",
    "range_bin_designs",
]

PFA_MIN = 1e-15
PFA_MAX = 0.5
N_INTEGRATED_MAX = 4096


def _log(x) -> np.ndarray:
    """Natural logarithm with log(0) = -inf and no warning (an underflowed probability)."""
    with np.errstate(divide="ignore"):
        return np.log(x)


def _log_comb(n: int, k: int) -> float:
    """ln C(n, k) from the exact integer (lgamma or betaln differences lose up to 1e-13 here)."""
    return math.log(math.comb(n, k))


# ----------------------------------------------------------------------------------------------------
# closed forms
# ----------------------------------------------------------------------------------------------------

def _ca_log_pfa_fn(n_train: int, k_int: int):
    """ln Pfa(T) of CA-CFAR, K > 1: sum_{i<K} C(NK+i-1, i) t^i / (1+t)^(NK+i), t = T / N."""
    m = n_train * k_int
    i = np.arange(k_int, dtype=np.float64)
    # ln C(m+i-1, i) by the recurrence C(m+i-1, i) = C(m+i-2, i-1) (m+i-1) / i: exact to a few 1e-14,
    # where gammaln or betaln differences lose about 1e-11 at m in the thousands
    log_c = np.concatenate(([0.0], np.cumsum(np.log((m + i[1:] - 1.0) / i[1:]))))

    def log_pfa(t_factor: float) -> float:
        t = t_factor / n_train
        return float(special.logsumexp(log_c + i * math.log(t) - (m + i) * math.log1p(t)))

    return log_pfa


def _os1_log_pfa_fn(n_train: int, rank: int):
    """ln Pfa(T) of OS-CFAR, K = 1 (Rohling 1983): sum_{i=0}^{k-1} ln(N - i) - ln(N - i + T)."""
    n_minus_i = n_train - np.arange(rank, dtype=np.float64)
    log_n_minus_i = np.log(n_minus_i)

    def log_pfa(t_factor: float) -> float:
        return float(np.sum(log_n_minus_i - np.log(n_minus_i + t_factor)))

    return log_pfa


# ----------------------------------------------------------------------------------------------------
# root finding
# ----------------------------------------------------------------------------------------------------

def _solve_log_t(log_pfa_fn, pfa: float, hint: float | None = None) -> float:
    """T with log_pfa_fn(T) = ln pfa, log_pfa_fn decreasing in T: a bracket on s = ln T (around the
    hint, a previous solution, when given; widened step by step), then Brent's method to 1e-14 in s."""
    target = math.log(pfa)
    known: dict[float, float] = {}

    def f(s: float) -> float:
        value = known.get(s)
        if value is None:
            # an underflowed Pfa (-inf) far above the root becomes a large finite negative value, so
            # that the root finder's interpolation stays finite (the sign is what matters there)
            value = max(log_pfa_fn(math.exp(s)) - target, -1e300)
            known[s] = value  # brentq evaluates the bracket ends again: answered from here
        return value

    centre, step = (math.log(hint), 1e-3) if hint else (0.0, 2.0)
    lo, hi = centre - step, centre + step
    s_lo = s_hi = step
    while f(lo) < 0.0:
        lo -= s_lo
        s_lo = min(2.0 * s_lo, 2.0)
        if lo < -700:
            raise RuntimeError("cfar threshold bracket failed (low side)")
    while f(hi) > 0.0:
        hi += s_hi
        s_hi = min(2.0 * s_hi, 2.0)
        if hi > 700:
            raise RuntimeError("cfar threshold bracket failed (high side)")
    s = optimize.brentq(f, lo, hi, xtol=1e-14, rtol=4.0 * np.finfo(float).eps, maxiter=200)
    return math.exp(s)


# ----------------------------------------------------------------------------------------------------
# numerical integration over the statistic's distribution
# ----------------------------------------------------------------------------------------------------

_GL_X, _GL_W = np.polynomial.legendre.leggauss(16)


def _stat_log_density(kind: str, s: np.ndarray, k_int: int, n_train: int, rank: int,
                      n_near: int) -> np.ndarray:
    """h(s) = ln(w f_W(w)) at w = exp(s), unit per-channel noise (OS, GO or SO)."""
    w = np.exp(s)
    if kind == "os":
        h = (math.log(rank) + _log_comb(n_train, rank) + (k_int - 1) * s - w - math.lgamma(k_int) + s)
        if rank > 1:
            h = h + (rank - 1) * _log(special.gammainc(k_int, w))
        if n_train > rank:
            h = h + (n_train - rank) * _log(special.gammaincc(k_int, w))
        return h
    if kind in ("go", "so"):
        n1, n2 = n_near, n_train - n_near
        a1, a2 = float(n1 * k_int), float(n2 * k_int)
        cdf_or_sf = special.gammainc if kind == "go" else special.gammaincc
        lf1 = math.log(n1) + (a1 - 1.0) * (math.log(n1) + s) - n1 * w - math.lgamma(a1)
        lf2 = math.log(n2) + (a2 - 1.0) * (math.log(n2) + s) - n2 * w - math.lgamma(a2)
        # GO: f1 F2 + f2 F1; SO: f1 (1 - F2) + f2 (1 - F1)
        lf = np.logaddexp(lf1 + _log(cdf_or_sf(a2, n2 * w)), lf2 + _log(cdf_or_sf(a1, n1 * w)))
        return lf + s
    raise ValueError(kind)


def _density_interval(kind: str, k_int: int, n_train: int, rank: int, n_near: int) -> tuple[float, float]:
    """The interval of s = ln w where h(s) is within 75 nepers of its maximum (on a 0.02 grid)."""
    s_c = math.log(k_int)
    coarse = np.arange(s_c - 240.0, s_c + 8.0, 0.02)
    h = _stat_log_density(kind, coarse, k_int, n_train, rank, n_near)
    keep = np.nonzero(h > float(np.max(h)) - 75.0)[0]
    return float(coarse[max(keep[0] - 1, 0)]), float(coarse[min(keep[-1] + 1, coarse.size - 1)])


def _quadrature_design(kind: str, n_train: int, pfa: float, k_int: int, rank: int,
                       n_near: int) -> tuple[float, float]:
    """(T, E[W]) by quadrature over ln w; see the module docstring."""
    s_lo, s_hi = _density_interval(kind, k_int, n_train, rank, n_near)
    k_float = float(k_int)
    prev_t = None
    n_panels = 32
    for _ in range(12):
        edges = np.linspace(s_lo, s_hi, n_panels + 1)
        half = 0.5 * (edges[1:] - edges[:-1])
        mid = 0.5 * (edges[1:] + edges[:-1])
        nodes = (mid[:, None] + half[:, None] * _GL_X[None, :]).ravel()
        hn = _stat_log_density(kind, nodes, k_int, n_train, rank, n_near) + np.log(
            (half[:, None] * _GL_W[None, :]).ravel())
        norm = math.exp(special.logsumexp(hn))
        w_nodes = np.exp(nodes)
        # Pfa = sum_i e^(h_i) Q(K, T w_i), with the largest h_i factored out: what
        # logsumexp(h, b=Q) computes, without its per-call cost, which would dominate the solve
        h_max = float(np.max(hn))
        weights = np.exp(hn - h_max)

        def log_pfa(t_factor, weights=weights, w_nodes=w_nodes, h_max=h_max):
            total = float(np.dot(weights, special.gammaincc(k_float, t_factor * w_nodes)))
            return h_max + math.log(total) if total > 0.0 else -math.inf

        t = _solve_log_t(log_pfa, pfa, prev_t)
        if prev_t is not None and abs(t - prev_t) <= 1e-9 * t and abs(norm - 1.0) < 1e-9:
            return t, math.exp(special.logsumexp(hn + nodes))
        prev_t = t
        n_panels *= 2
    raise RuntimeError(f"cfar quadrature did not converge for kind={kind}, N={n_train}, K={k_int}")


# ----------------------------------------------------------------------------------------------------
# designs
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


def default_rank(n_train: int, fraction: float) -> int:
    """OS rank (1-based) for a training set of n_train cells: round(fraction * n_train) in [1, n_train]."""
    return int(min(max(int(round(fraction * n_train)), 1), n_train))


@lru_cache(maxsize=4096)
def _design(kind: str, n_train: int, pfa: float, k_int: int, rank: int, n_near: int) -> tuple[float, float]:
    """(threshold factor T, E[W] for unit per-channel noise). Arguments already normalised."""
    if kind in ("go", "so") and (n_near == 0 or n_near == n_train):
        # one half is empty: the statistic is the mean of the other half (cell averaging)
        kind = "ca"
    if kind == "ca":
        if k_int == 1:
            return n_train * math.expm1(-math.log(pfa) / n_train), 1.0
        return _solve_log_t(_ca_log_pfa_fn(n_train, k_int), pfa), float(k_int)
    if kind == "os" and k_int == 1:
        t = _solve_log_t(_os1_log_pfa_fn(n_train, rank), pfa)
        return t, float(sum(1.0 / (n_train - i) for i in range(rank)))
    return _quadrature_design(kind, n_train, pfa, k_int, rank, n_near)


def _normalise(kind, n_train, pfa, n_integrated, os_rank, n_near):
    _check_design_args(kind, n_train, pfa, n_integrated, os_rank, n_near)
    rank = 0
    if kind == "os":
        rank = int(os_rank) if os_rank is not None else default_rank(int(n_train), 0.75)
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


def range_bin_designs(kind: str, pfa: float, os_rank_fraction: float, n_integrated: int,
                      n_train: np.ndarray, n_train_near: np.ndarray):
    """Per range bin, for its own training set (``n_train[r]`` cells, ``n_train_near[r]`` of them in the
    near half): threshold factor T, noise scale K / E[W], 0-based OS rank (0 for the other kinds) and
    E[W] for unit per-channel noise. Arguments as validated by CfarSettings and Cfar."""
    n_range = n_train.shape[0]
    factor = np.empty(n_range, dtype=np.float64)
    noise_scale = np.empty(n_range, dtype=np.float64)
    rank0 = np.zeros(n_range, dtype=np.int64)
    mean_w = np.empty(n_range, dtype=np.float64)
    for r in range(n_range):
        n = int(n_train[r])
        rank = default_rank(n, float(os_rank_fraction)) if kind == "os" else 0
        near = int(n_train_near[r]) if kind in ("go", "so") else 0
        t, mean_w[r] = _design(kind, n, float(pfa), n_integrated, rank, near)
        factor[r] = t
        noise_scale[r] = n_integrated / mean_w[r]
        rank0[r] = max(rank - 1, 0)
    return factor, noise_scale, rank0, mean_w
