"""Tests of the 2D CFAR detector (daemon.chain.cfar) against published formulas and scipy.

Noise model throughout: a map cell is the sum of |X|^2 over K channels of unit complex Gaussian noise,
i.e. Gamma(K, 1) times the per-channel noise power (common practice, square-law non-coherent
integration).
"""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy import integrate, special, stats

from cubecast.daemon.chain import cfar as cfar_mod
from cubecast.daemon.chain import cfar_design
from cubecast.daemon.chain.cfar import Cfar, CfarSettings, noise_statistic_mean, threshold_factor
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.settings import ProcessingSettings

PFA_GRID = [1e-2, 1e-4, 1e-6]


# ----------------------------------------------------------------------------------------------------
# threshold factors
# ----------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("n_train", [1, 4, 16, 64, 216])
@pytest.mark.parametrize("pfa", PFA_GRID)
def test_ca_single_channel_matches_closed_form(n_train, pfa):
    # Richards, "Fundamentals of Radar Signal Processing", 2005, ch. 7: CA-CFAR with the mean of N
    # training cells, square-law detector: alpha = N (Pfa^(-1/N) - 1).
    expected = n_train * (pfa ** (-1.0 / n_train) - 1.0)
    assert threshold_factor("ca", n_train, pfa, 1) == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("k_int", [2, 4, 12, 32])
@pytest.mark.parametrize("n_train", [1, 8, 100])
@pytest.mark.parametrize("pfa", PFA_GRID)
def test_ca_integrated_matches_f_distribution(k_int, n_train, pfa):
    # Derivation (standard chi-square ratio): 2X ~ chi2(2K), 2*sum(Y) ~ chi2(2NK), so
    # (X/K) / (sum(Y)/(NK)) = X / mean(Y) ~ F(2K, 2NK): T = F.isf(Pfa; 2K, 2NK). scipy as reference.
    t = threshold_factor("ca", n_train, pfa, k_int)
    assert t == pytest.approx(stats.f.isf(pfa, 2 * k_int, 2 * n_train * k_int), rel=1e-7)
    assert stats.f.sf(t, 2 * k_int, 2 * n_train * k_int) == pytest.approx(pfa, rel=1e-10)


def _rohling_pfa(t, n, k):
    # Rohling, "Radar CFAR thresholding in clutter and multiple target situations", IEEE Trans. AES,
    # 1983: Pfa = k C(N,k) Gamma(k) Gamma(T+N-k+1) / Gamma(T+N+1), evaluated with scipy gammaln.
    log_p = (math.log(k) + special.gammaln(n + 1) - special.gammaln(k + 1) - special.gammaln(n - k + 1)
             + special.gammaln(k) + special.gammaln(t + n - k + 1) - special.gammaln(t + n + 1))
    return math.exp(log_p)


@pytest.mark.parametrize("n_train,rank", [(24, 18), (216, 162), (8, 1), (8, 8), (40, 30)])
@pytest.mark.parametrize("pfa", PFA_GRID)
def test_os_single_channel_matches_rohling(n_train, rank, pfa):
    t = threshold_factor("os", n_train, pfa, 1, os_rank=rank)
    assert _rohling_pfa(t, n_train, rank) == pytest.approx(pfa, rel=1e-8)
    # the numerical integrator used for K > 1, run on the K = 1 case, must reproduce the closed form
    t_quad, mean_quad = cfar_design._quadrature_design("os", n_train, pfa, 1, rank, 0)
    assert _rohling_pfa(t_quad, n_train, rank) == pytest.approx(pfa, rel=1e-8)
    # mean of the k-th smallest of N unit exponentials = sum_{i=0}^{k-1} 1/(N-i) (Renyi 1953,
    # "On the theory of order statistics", exponential spacings)
    assert mean_quad == pytest.approx(sum(1.0 / (n_train - i) for i in range(rank)), rel=1e-9)


def _gk_pfa(t, n_half):
    # Gandhi & Kassam, "Analysis of CFAR processors in homogeneous background", IEEE Trans. AES,
    # 1988 (formulas from memory, re-derived here): with half sums S1, S2 of n unit exponentials and
    # t the factor on the sums, P(X > t min) = 2 sum_{i<n} C(n-1+i, i) (2+t)^-(n+i), and, because
    # 1{X>t max} + 1{X>t min} = 1{X>t S1} + 1{X>t S2}, P(X > t max) = 2 (1+t)^-n - P(X > t min).
    so = 2.0 * sum(special.comb(n_half - 1 + i, i) * (2.0 + t) ** (-(n_half + i)) for i in range(n_half))
    go = 2.0 * (1.0 + t) ** (-n_half) - so
    return go, so


@pytest.mark.parametrize("n_half", [2, 8, 32])
@pytest.mark.parametrize("pfa", PFA_GRID)
def test_go_so_single_channel_match_closed_form(n_half, pfa):
    # the statistic is the max/min of half MEANS, so the factor on the half sums is T / n_half
    t_go = threshold_factor("go", 2 * n_half, pfa, 1)
    t_so = threshold_factor("so", 2 * n_half, pfa, 1)
    assert _gk_pfa(t_go / n_half, n_half)[0] == pytest.approx(pfa, rel=1e-8)
    assert _gk_pfa(t_so / n_half, n_half)[1] == pytest.approx(pfa, rel=1e-8)


def _scipy_pfa(kind, t, k_int, n_train, rank=None, n_near=None):
    """Pfa by scipy.integrate.quad over the statistic's density built from scipy.stats.gamma."""
    if kind == "os":
        def integrand(y):
            cdf = stats.gamma.cdf(y, k_int)
            dens = (rank * special.comb(n_train, rank) * cdf ** (rank - 1) * (1 - cdf) ** (n_train - rank)
                    * stats.gamma.pdf(y, k_int))
            return dens * stats.gamma.sf(t * y, k_int)
    else:
        n1, n2 = n_near, n_train - n_near
        a = stats.gamma(n1 * k_int, scale=1.0 / n1)  # mean of n1 Gamma(K) cells
        b = stats.gamma(n2 * k_int, scale=1.0 / n2)
        if kind == "go":
            def integrand(w):
                return (a.pdf(w) * b.cdf(w) + b.pdf(w) * a.cdf(w)) * stats.gamma.sf(t * w, k_int)
        else:
            def integrand(w):
                return (a.pdf(w) * b.sf(w) + b.pdf(w) * a.sf(w)) * stats.gamma.sf(t * w, k_int)
    value, _ = integrate.quad(integrand, 0.0, np.inf, limit=500, epsabs=0.0, epsrel=1e-10)
    return value


GENERAL_CASES = [
    ("os", 24, 18, None),
    ("os", 108, 81, None),
    ("go", 24, None, 12),
    ("so", 24, None, 12),
    ("go", 40, None, 13),  # unequal halves, as at a range edge
    ("so", 40, None, 13),
]


@pytest.mark.parametrize("kind,n_train,rank,n_near", GENERAL_CASES)
@pytest.mark.parametrize("k_int", [2, 12])
@pytest.mark.parametrize("pfa", [1e-2, 1e-6])
def test_general_factor_matches_scipy_quadrature(kind, n_train, rank, n_near, k_int, pfa):
    # scipy (stats.gamma + integrate.quad) as an independent reference for the integral
    # Pfa = E_W[Q(K, T W)] (definition of Pfa for a Gamma(K) cell under test).
    t = threshold_factor(kind, n_train, pfa, k_int, os_rank=rank, n_near=n_near)
    assert _scipy_pfa(kind, t, k_int, n_train, rank, n_near) == pytest.approx(pfa, rel=1e-6)


@pytest.mark.parametrize("kind,n_train,rank,n_near", [GENERAL_CASES[0], GENERAL_CASES[2], GENERAL_CASES[3],
                                                      GENERAL_CASES[4], GENERAL_CASES[5]])
@pytest.mark.parametrize("k_int", [4, 12])
def test_general_factor_monte_carlo(kind, n_train, rank, n_near, k_int):
    # Monte Carlo with numpy (definition of Pfa): draw CUT and training cells, count crossings.
    pfa = 1e-2
    n_trials = 300_000
    rng = np.random.default_rng(1000 + 7 * k_int + n_train)
    t = threshold_factor(kind, n_train, pfa, k_int, os_rank=rank, n_near=n_near)
    cut = rng.gamma(k_int, size=n_trials)
    if kind == "os":
        train = rng.gamma(k_int, size=(n_trials, n_train))
        stat = np.partition(train, rank - 1, axis=1)[:, rank - 1]
    else:
        n1, n2 = n_near, n_train - n_near
        m1 = rng.gamma(n1 * k_int, size=n_trials) / n1
        m2 = rng.gamma(n2 * k_int, size=n_trials) / n2
        stat = np.maximum(m1, m2) if kind == "go" else np.minimum(m1, m2)
    measured = np.mean(cut > t * stat)
    sigma = math.sqrt(pfa * (1 - pfa) / n_trials)
    assert abs(measured - pfa) < 5 * sigma
    # the noise normalisation E[W] (unit per-channel noise) against the sample mean
    mean_w = noise_statistic_mean(kind, n_train, k_int, os_rank=rank, n_near=n_near)
    assert mean_w == pytest.approx(np.mean(stat), rel=5e-3)


def test_empty_half_falls_back_to_cell_averaging():
    # With one half empty the GO/SO statistic is the other half's mean: CA on that half
    # (follows from the definition; CA reference: Richards 2005 ch. 7).
    for kind in ("go", "so"):
        assert threshold_factor(kind, 12, 1e-4, 1, n_near=0) == pytest.approx(12 * (1e-4 ** (-1 / 12) - 1), rel=1e-9)


# ----------------------------------------------------------------------------------------------------
# the window statistic against a brute-force reference
# ----------------------------------------------------------------------------------------------------

def _reference_threshold(power, s: CfarSettings, k_int):
    """Per-cell threshold computed cell by cell from the window definition (numpy)."""
    n_r, n_d = power.shape
    wr, wd = s.guard_range + s.train_range, s.guard_doppler + s.train_doppler
    out = np.zeros((n_r, n_d))
    for r in range(n_r):
        for j in range(n_d):
            near, far = [], []
            for dr in range(-wr, wr + 1):
                rr = r + dr
                if rr < 0 or rr >= n_r:
                    continue
                for dd in range(-wd, wd + 1):
                    if abs(dr) <= s.guard_range and abs(dd) <= s.guard_doppler:
                        continue
                    v = float(power[rr, (j + dd) % n_d])
                    (near if (dr < 0 or (dr == 0 and dd < 0)) else far).append(v)
            cells = np.array(near + far)
            n = cells.size
            if s.kind == "ca":
                stat, t = cells.mean(), threshold_factor("ca", n, s.pfa, k_int)
            elif s.kind == "os":
                rank = min(max(int(round(s.os_rank_fraction * n)), 1), n)
                stat = np.sort(cells)[rank - 1]
                t = threshold_factor("os", n, s.pfa, k_int, os_rank=rank)
            else:
                if not near or not far:
                    stat = np.mean(near or far)
                else:
                    pick = max if s.kind == "go" else min
                    stat = pick(np.mean(near), np.mean(far))
                t = threshold_factor(s.kind, n, s.pfa, k_int, n_near=len(near))
            out[r, j] = t * stat
    return out


@pytest.mark.parametrize("kind", ["ca", "os", "go", "so"])
@pytest.mark.parametrize("window", [(3, 1, 2, 1), (2, 0, 0, 1), (1, 2, 3, 0)])
def test_threshold_map_matches_brute_force(kind, window):
    # Reference: the window definition (rectangle minus guard rectangle, circular Doppler, truncated
    # range) evaluated cell by cell with numpy. The map has a clutter ridge, ties and a strong target.
    tr, gr, td, gd = window
    rng = np.random.default_rng(5)
    n_r, n_d = 23, 17
    power = rng.gamma(3, size=(n_r, n_d)).astype(np.float32)
    power[:, 0] *= 40.0  # zero-Doppler clutter ridge (column 0 here)
    power[5:9, 3:7] = np.round(power[5:9, 3:7])  # ties
    power[11, 8] = 5e4
    s = CfarSettings(kind=kind, train_range=tr, guard_range=gr, train_doppler=td, guard_doppler=gd,
                     pfa=1e-3, os_rank_fraction=0.7)
    det = Cfar(s, n_r, n_d, 3)
    got = det.threshold(power)
    np.testing.assert_allclose(got, _reference_threshold(power, s, 3), rtol=2e-5)


# ----------------------------------------------------------------------------------------------------
# measured false-alarm rate on noise-only maps
# ----------------------------------------------------------------------------------------------------

def _binomial_check(count, n, pfa, what):
    # Binomial standard deviation (common practice): a count of n cells that each cross with
    # probability pfa lies within 5 sigma of n pfa, sigma = sqrt(n pfa (1 - pfa)), but for about one
    # run in 1.7 million. Cells that share training cells could cross together more often than
    # independent ones; measured once for the designs below (600 noise maps of 128 x 64, interior
    # rows), the variance of the per-map count was 0.89 to 1.02 times the binomial one, i.e. within
    # its own sampling error (about 0.06) of it.
    sigma = math.sqrt(n * pfa * (1.0 - pfa))
    assert abs(count - n * pfa) <= 5.0 * sigma, (what, count, n * pfa, sigma)


@pytest.mark.parametrize("kind", ["ca", "os", "go", "so"])
@pytest.mark.parametrize("k_int", [1, 12])
def test_false_alarm_rate_on_noise_maps(kind, k_int):
    # Design property of CFAR (Richards 2005 ch. 7; for OS Rohling 1983): in homogeneous noise of any
    # level the threshold-crossing probability per cell is the design Pfa. Noise maps are drawn
    # directly: a cell is sigma2 times the sum of K unit exponentials, Gamma(K, 1) (square-law
    # detection of K channels of complex Gaussian noise). Interior rows on 128 x 64 maps; the range
    # edges, where each row has its own truncated training set and design, on maps of 2 wr + 1 rows
    # (every row but the middle one is an edge row) and 1024 Doppler columns.
    pfa = 1e-3
    s = CfarSettings(kind=kind, train_range=4, guard_range=1, train_doppler=3, guard_doppler=1, pfa=pfa,
                     local_max=False)
    wr = s.train_range + s.guard_range
    rng = np.random.default_rng(77 + k_int)
    noise_level = 37.5  # arbitrary: CFAR must not depend on it

    def crossings(n_r, n_d, n_maps):
        det = Cfar(s, n_r, n_d, k_int)
        counts = np.zeros(n_r, dtype=np.int64)
        for _ in range(n_maps):
            power = (noise_level * rng.gamma(k_int, size=(n_r, n_d))).astype(np.float32)
            counts += np.bincount(det.detect(power).range_bin, minlength=n_r)
        return counts

    n_maps, n_r, n_d = 200, 128, 64  # interior: 1.5e6 cells, 5 sigma = 13 % of the expected count
    counts = crossings(n_r, n_d, n_maps)
    interior = counts[wr:n_r - wr]
    _binomial_check(int(interior.sum()), interior.size * n_d * n_maps, pfa, "interior")

    n_maps, n_r, n_d = 200, 2 * wr + 1, 1024  # edges: 2e6 cells (11 %); outermost rows 4e5 cells (25 %)
    counts = crossings(n_r, n_d, n_maps)
    edges = np.r_[counts[:wr], counts[wr + 1:]]
    _binomial_check(int(edges.sum()), edges.size * n_d * n_maps, pfa, "edges")
    outermost = counts[[0, n_r - 1]]
    _binomial_check(int(outermost.sum()), 2 * n_d * n_maps, pfa, "outermost rows")


# ----------------------------------------------------------------------------------------------------
# detection probability versus Albersheim's equation
# ----------------------------------------------------------------------------------------------------

def _albersheim_snr_db(pd, pfa, n):
    # Albersheim, "A closed-form approximation to Robertson's detection characteristics",
    # Proc. IEEE, 1981: per-pulse SNR for N non-coherently integrated pulses, steady target, linear
    # detector; valid 1e-7 <= Pfa <= 1e-3, 0.1 <= Pd <= 0.9, accurate to about 0.2 dB.
    a = math.log(0.62 / pfa)
    b = math.log(pd / (1 - pd))
    return -5 * math.log10(n) + (6.2 + 4.54 / math.sqrt(n + 0.44)) * math.log10(a + 0.12 * a * b + 1.7 * b)


@pytest.mark.parametrize("k_int", [1, 12])
def test_detection_probability_follows_albersheim(k_int):
    # Steady (Swerling 0) target of constant amplitude in each of K channels plus unit complex
    # Gaussian noise, CA-CFAR with 352 training cells (CFAR loss a few hundredths of a dB). Our
    # detector is square-law; Albersheim's is linear: for K = 1 they are the same test, for K = 12
    # the square-law detector needs about 0.1-0.2 dB more or less (common practice, from memory),
    # well inside the 1 dB tolerance.
    pfa = 1e-4
    n_r, n_d = 256, 128
    s = CfarSettings(kind="ca", train_range=8, guard_range=1, train_doppler=8, guard_doppler=1, pfa=pfa,
                     local_max=False)
    det = Cfar(s, n_r, n_d, k_int)
    rows = np.arange(12, n_r - 12, 20)
    cols = np.arange(10, n_d, 20)
    rr, cc = np.meshgrid(rows, cols, indexing="ij")
    rr, cc = rr.ravel(), cc.ravel()
    snr50 = _albersheim_snr_db(0.5, pfa, k_int)
    snr90 = _albersheim_snr_db(0.9, pfa, k_int)
    grid_db = np.arange(snr50 - 2.5, snr90 + 2.0, 0.25)
    rng = np.random.default_rng(2024 + k_int)
    n_maps_per_point = 6
    pd = np.zeros(grid_db.size)
    for i, snr_db in enumerate(grid_db):
        amp = math.sqrt(10 ** (snr_db / 10))
        hits = 0
        for _ in range(n_maps_per_point):
            power = rng.gamma(k_int, size=(n_r, n_d)).astype(np.float32)
            noise = (rng.standard_normal((rr.size, k_int)) + 1j * rng.standard_normal((rr.size, k_int))) / math.sqrt(2)
            phase = np.exp(2j * np.pi * rng.random((rr.size, k_int)))
            power[rr, cc] = np.sum(np.abs(amp * phase + noise) ** 2, axis=1)
            found = det.detect(power)
            mask = np.zeros((n_r, n_d), dtype=bool)
            mask[found.range_bin, found.doppler_bin] = True
            hits += int(mask[rr, cc].sum())
        pd[i] = hits / (rr.size * n_maps_per_point)
    pd_mono = np.maximum.accumulate(pd)
    for target_pd, snr_alb in ((0.5, snr50), (0.9, snr90)):
        snr_sim = float(np.interp(target_pd, pd_mono, grid_db))
        assert abs(snr_sim - snr_alb) < 1.0, (target_pd, snr_sim, snr_alb)


# ----------------------------------------------------------------------------------------------------
# local-maximum grouping, edges, gates, detection fields
# ----------------------------------------------------------------------------------------------------

def _noise_map(rng, n_r, n_d, k_int, level=1.0):
    return (level * rng.gamma(k_int, size=(n_r, n_d))).astype(np.float32)


def _blob(power, r, j, peak):
    """Target spread over its 3x3 neighbourhood (peak at the centre, circular in Doppler)."""
    n_r, n_d = power.shape
    for dr in (-1, 0, 1):
        for dd in (-1, 0, 1):
            rr = r + dr
            if 0 <= rr < n_r:
                power[rr, (j + dd) % n_d] += peak * (0.5 ** (abs(dr) + abs(dd)))


KINDS = ["ca", "os", "go", "so"]


def _settings(kind, **kw):
    base = dict(kind=kind, train_range=6, guard_range=2, train_doppler=4, guard_doppler=2, pfa=1e-6)
    base.update(kw)
    return CfarSettings(**base)


@pytest.mark.parametrize("kind", KINDS)
def test_spread_target_gives_one_detection(kind):
    # local-maximum peak grouping (common practice): one target -> one detection at its peak
    rng = np.random.default_rng(11)
    power = _noise_map(rng, 128, 64, 12)
    _blob(power, 60, 30, 5000.0)
    found = Cfar(_settings(kind), 128, 64, 12).detect(power)
    assert list(zip(found.range_bin, found.doppler_bin)) == [(60, 30)]
    # a plateau of two equal neighbouring peak cells still gives one detection (first in row-major order)
    power[60, 31] = power[60, 30]
    found = Cfar(_settings(kind), 128, 64, 12).detect(power)
    assert list(zip(found.range_bin, found.doppler_bin)) == [(60, 30)]
    # without grouping the same target gives several crossings
    raw = Cfar(_settings(kind, local_max=False), 128, 64, 12).detect(power)
    assert len(raw) >= 5


@pytest.mark.parametrize("kind", KINDS)
def test_two_separated_targets_give_two_detections(kind):
    rng = np.random.default_rng(12)
    power = _noise_map(rng, 128, 64, 12)
    _blob(power, 30, 10, 3000.0)
    _blob(power, 95, 50, 8000.0)
    found = Cfar(_settings(kind), 128, 64, 12).detect(power)
    assert sorted(zip(found.range_bin.tolist(), found.doppler_bin.tolist())) == [(30, 10), (95, 50)]


@pytest.mark.parametrize("kind", KINDS)
def test_doppler_wrap_around(kind):
    # Doppler is circular (the Doppler FFT is periodic): a blob at column 0 spills into the last
    # column and vice versa; grouping must see across the seam.
    rng = np.random.default_rng(13)
    det = Cfar(_settings(kind), 128, 64, 12)
    for col in (0, 63):
        power = _noise_map(rng, 128, 64, 12)
        _blob(power, 70, col, 6000.0)
        found = det.detect(power)
        assert list(zip(found.range_bin, found.doppler_bin)) == [(70, col)]


@pytest.mark.parametrize("kind", KINDS)
def test_targets_at_first_and_last_range_bin(kind):
    rng = np.random.default_rng(14)
    power = _noise_map(rng, 128, 64, 12)
    _blob(power, 0, 20, 4000.0)
    _blob(power, 127, 40, 4000.0)
    found = Cfar(_settings(kind), 128, 64, 12).detect(power)
    assert sorted(zip(found.range_bin.tolist(), found.doppler_bin.tolist())) == [(0, 20), (127, 40)]


def test_range_gates():
    rng = np.random.default_rng(15)
    power = _noise_map(rng, 128, 64, 12)
    for r in (5, 40, 90, 120):
        _blob(power, r, 32, 5000.0)
    found = Cfar(_settings("ca", range_min_bin=20, range_max_bin=100), 128, 64, 12).detect(power)
    assert sorted(found.range_bin.tolist()) == [40, 90]
    found = Cfar(_settings("ca", range_max_bin=120), 128, 64, 12).detect(power)
    assert sorted(found.range_bin.tolist()) == [5, 40, 90]


@pytest.mark.parametrize("kind", KINDS)
def test_noise_and_snr_estimates(kind):
    # The reported noise is the estimated mean of a noise-only cell, K * sigma2 (mean of a sum of K
    # exponentials, common practice), and power/noise - 1 estimates the per-channel SNR A^2/sigma2
    # (E[sum |A e^jphi + n|^2] = K (A^2 + sigma2)).
    k_int, sigma2, snr_true = 12, 2.5, 10.0
    rng = np.random.default_rng(16)
    det = Cfar(_settings(kind), 128, 64, k_int)
    rows = np.arange(15, 120, 18)
    cols = np.arange(6, 64, 13)
    noise_all, snr_all = [], []
    for _ in range(6):
        power = _noise_map(rng, 128, 64, k_int, sigma2)
        for r in rows:
            for c in cols:
                x = math.sqrt(sigma2 * snr_true) * np.exp(2j * np.pi * rng.random(k_int))
                x = x + math.sqrt(sigma2 / 2) * (rng.standard_normal(k_int) + 1j * rng.standard_normal(k_int))
                power[r, c] = np.sum(np.abs(x) ** 2)
        found = det.detect(power)
        assert len(found) == rows.size * cols.size
        assert found.range_bin.dtype == np.int32 and found.doppler_bin.dtype == np.int32
        assert found.power.dtype == np.float32 and found.noise.dtype == np.float32
        assert found.snr_linear.dtype == np.float32
        np.testing.assert_array_equal(found.power, power[found.range_bin, found.doppler_bin])
        noise_all.append(found.noise)
        snr_all.append(found.snr_linear)
    noise_all = np.concatenate(noise_all)
    snr_all = np.concatenate(snr_all)
    assert np.mean(noise_all) == pytest.approx(k_int * sigma2, rel=0.02)
    assert np.mean(snr_all) == pytest.approx(snr_true, rel=0.05)


def test_snr_is_clipped_positive():
    # snr_linear = power/noise - 1 is negative for a crossing when T * W < noise, which happens for CA
    # with K = 12 at Pfa = 0.5 (T = F(24, 2NK) median < 1, scipy.stats.f); it must be clipped, not
    # reported <= 0.
    assert stats.f.isf(0.5, 24, 2 * 64 * 12) < 1.0
    rng = np.random.default_rng(17)
    s = CfarSettings(kind="ca", train_range=4, guard_range=0, train_doppler=4, guard_doppler=0, pfa=0.5,
                     local_max=False)
    found = Cfar(s, 64, 16, 12).detect(_noise_map(rng, 64, 16, 12))
    assert len(found) > 0
    assert np.all(found.snr_linear >= np.float32(cfar_mod.SNR_FLOOR_LINEAR))
    assert np.any(found.snr_linear == np.float32(cfar_mod.SNR_FLOOR_LINEAR))


# ----------------------------------------------------------------------------------------------------
# validation
# ----------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs,field", [
    (dict(kind="median"), "kind"),
    (dict(train_range=-1), "train_range"),
    (dict(guard_range=1.5), "guard_range"),
    (dict(train_doppler=True), "train_doppler"),
    (dict(guard_doppler="2"), "guard_doppler"),
    (dict(train_range=0, train_doppler=0), "train_range"),
    (dict(pfa=0.0), "pfa"),
    (dict(pfa=0.9), "pfa"),
    (dict(pfa=float("nan")), "pfa"),
    (dict(os_rank_fraction=0.0), "os_rank_fraction"),
    (dict(os_rank_fraction=1.5), "os_rank_fraction"),
    (dict(range_min_bin=-3), "range_min_bin"),
    (dict(range_min_bin=10, range_max_bin=10), "range_max_bin"),
    (dict(local_max="yes"), "local_max"),
])
def test_bad_settings_raise(kwargs, field):
    with pytest.raises(CubecastError, match=field):
        CfarSettings(**kwargs)


def test_defaults_are_the_processing_defaults():
    # the chain is always built from [processing]; a detector made without arguments must not
    # silently design something else
    p = ProcessingSettings()
    s = CfarSettings()
    assert (s.kind, s.train_range, s.guard_range, s.train_doppler, s.guard_doppler, s.pfa, s.os_rank_fraction) == (
        p.cfar_kind, p.cfar_train_range, p.cfar_guard_range, p.cfar_train_doppler, p.cfar_guard_doppler, p.cfar_pfa,
        p.cfar_os_rank_fraction)


def test_bad_geometry_and_maps_raise():
    ca = dict(kind="ca", train_range=8, guard_range=2, train_doppler=4, guard_doppler=1, pfa=1e-4)
    s = CfarSettings(**{**ca, "train_doppler": 20, "guard_doppler": 2})
    with pytest.raises(CubecastError, match="n_doppler"):
        Cfar(s, 128, 32, 12)
    with pytest.raises(CubecastError, match="range_max_bin"):
        Cfar(CfarSettings(**ca, range_max_bin=200), 128, 64, 12)
    with pytest.raises(CubecastError, match="n_integrated"):
        Cfar(CfarSettings(**ca), 128, 64, 0)
    with pytest.raises(CubecastError, match="training cells"):
        Cfar(CfarSettings(**{**ca, "train_range": 1, "guard_range": 3, "train_doppler": 0}), 3, 16, 1)
    det = Cfar(CfarSettings(**ca), 128, 64, 12)
    with pytest.raises(CubecastError, match="shape"):
        det.detect(np.zeros((64, 128), dtype=np.float32))
    with pytest.raises(CubecastError, match="float32"):
        det.detect(np.zeros((128, 64), dtype=np.float64))
    with pytest.raises(CubecastError, match="os_rank"):
        threshold_factor("os", 10, 1e-3, 1, os_rank=11)
    with pytest.raises(CubecastError, match="pfa"):
        threshold_factor("ca", 10, 2.0, 1)


# ----------------------------------------------------------------------------------------------------
# the OS-CFAR detector (Cfar.detect) against a brute-force OS-CFAR written from cfar.py's docstring
# ----------------------------------------------------------------------------------------------------

def _brute_force_os_detect(power, s: CfarSettings, k_int):
    """OS-CFAR with local-maximum grouping, row by row with numpy's sort, from the definitions in
    cfar.py's docstring: training cells = the (2 (gr + tr) + 1) x (2 (gd + td) + 1) rectangle around
    the cell minus the (2 gr + 1) x (2 gd + 1) guard rectangle, Doppler circular, range truncated at the
    map edges; k = round(os_rank_fraction N) clipped to [1, N]; W = the k-th smallest; T designed for
    that N and k (threshold_factor, checked against Rohling 1983 and scipy above); a crossing is
    p > T W; kept if larger than the 3x3 neighbours at (-1, *) and (0, -1) and not smaller than those
    at (0, +1) and (+1, *) (Doppler circular, range truncated); rows in the range gates only.
    Returns the detections in row-major order as (row, column, noise) with noise = W K / E[W]
    (noise_statistic_mean, Renyi 1953 for K = 1)."""
    n_r, n_d = power.shape
    wr, wd = s.guard_range + s.train_range, s.guard_doppler + s.train_doppler
    x = power.astype(np.float64)
    cols = np.arange(n_d)
    crossing = np.zeros((n_r, n_d), dtype=bool)
    noise = np.zeros((n_r, n_d))
    r_lo = s.range_min_bin or 0
    r_hi = n_r if s.range_max_bin is None else s.range_max_bin
    for r in range(r_lo, r_hi):
        offsets = [(dr, dd) for dr in range(-wr, wr + 1) if 0 <= r + dr < n_r for dd in range(-wd, wd + 1)
                   if not (abs(dr) <= s.guard_range and abs(dd) <= s.guard_doppler)]
        n = len(offsets)
        k = min(max(int(round(s.os_rank_fraction * n)), 1), n)
        rows = np.array([r + dr for dr, _ in offsets])
        dds = np.array([dd for _, dd in offsets])
        train = x[rows[None, :], (cols[:, None] + dds[None, :]) % n_d]  # (n_d, n)
        w = np.sort(train, axis=1)[:, k - 1]
        t = threshold_factor("os", n, s.pfa, k_int, os_rank=k)
        crossing[r] = x[r] > t * w
        noise[r] = w * k_int / noise_statistic_mean("os", n, k_int, os_rank=k)
    found = []
    for r, j in zip(*np.nonzero(crossing)):
        p = x[r, j]
        keep = True
        for dr in (-1, 0, 1):
            for dd in (-1, 0, 1):
                if (dr, dd) == (0, 0) or not 0 <= r + dr < n_r:
                    continue
                q = x[r + dr, (j + dd) % n_d]
                keep &= (p > q) if (dr < 0 or (dr == 0 and dd < 0)) else (p >= q)
        if keep:
            found.append((int(r), int(j), noise[r, j]))
    return found


def _check_against_brute_force(power, s, k_int):
    found = Cfar(s, *power.shape, k_int).detect(power)
    ref = _brute_force_os_detect(power, s, k_int)
    assert list(zip(found.range_bin.tolist(), found.doppler_bin.tolist())) == [(r, j) for r, j, _ in ref]
    if ref:
        noise_ref = np.array([n for _, _, n in ref])
        np.testing.assert_allclose(found.noise, noise_ref, rtol=1e-6)
        np.testing.assert_array_equal(found.power, power[found.range_bin, found.doppler_bin])
        # snr = power / noise - 1, at least SNR_FLOOR_LINEAR (cfar.py's docstring)
        np.testing.assert_allclose(found.snr_linear, np.maximum(found.power / noise_ref - 1.0, 1e-6), rtol=2e-6)
    return found, ref


def _steady_target(rng, k_int, snr_db):
    # a steady target of per-channel SNR snr_db in each of K channels of unit complex Gaussian noise:
    # sum_k |A e^(j phi_k) + n_k|^2 (square-law non-coherent integration, common practice)
    amp = math.sqrt(10 ** (snr_db / 10))
    x = amp * np.exp(2j * np.pi * rng.random(k_int))
    x += (rng.standard_normal(k_int) + 1j * rng.standard_normal(k_int)) / math.sqrt(2)
    return np.float32(np.sum(np.abs(x) ** 2))


def test_os_detect_finds_targets_in_the_quiet_part_of_a_clutter_map():
    # The case of the issue "Measurements": clutter 40 times the noise over rows 0-159 of a 256 x 64
    # map (62 % of it), K = 12, default settings, 8 targets at +10 dB per channel in the quiet rows.
    # A skip rule keyed to the map's median misses them all; detect must find what the full
    # ordered statistic finds: all 8.
    rng = np.random.default_rng(12)
    k_int, n_r, n_d = 12, 256, 64
    power = rng.gamma(k_int, size=(n_r, n_d)).astype(np.float32)
    power[:160] *= np.float32(40.0)
    targets = [(176 + 9 * i, 4 + 7 * i) for i in range(8)]
    for r, j in targets:
        power[r, j] = _steady_target(rng, k_int, 10.0)
    found, ref = _check_against_brute_force(power, CfarSettings(), k_int)
    assert set(targets) <= {(r, j) for r, j, _ in ref}
    assert set(targets) <= set(zip(found.range_bin.tolist(), found.doppler_bin.tolist()))


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("shape,k_int", [((128, 32), 12), ((256, 128), 12), ((96, 64), 1)])
def test_os_detect_equals_brute_force_with_ridge_and_targets(seed, shape, k_int):
    # receiver noise with a zero-Doppler clutter ridge, strong targets (with a weaker range neighbour)
    rng = np.random.default_rng(seed)
    power = rng.gamma(k_int, 1.0, size=shape).astype(np.float32)
    power[:, shape[1] // 2] *= 30.0
    for _ in range(25):
        r, d = rng.integers(0, shape[0]), rng.integers(0, shape[1])
        power[r, d] += np.float32(rng.uniform(5, 3000) * k_int)
        power[min(r + 1, shape[0] - 1), d] += np.float32(rng.uniform(1, 300) * k_int)
    s = CfarSettings(kind="os", guard_range=3, guard_doppler=2, train_range=8, train_doppler=4, pfa=1e-5)
    _, ref = _check_against_brute_force(power, s, k_int)
    assert len(ref) >= 10


@st.composite
def _clutter_case(draw):
    """A random OS-CFAR geometry and a map of Gamma(K) noise under random clutter: rectangular blocks,
    a range ramp, a step edge in range or Doppler, each at random levels (-30 to +40 dB), optional
    quantisation (ties), and random targets."""
    n_r = draw(st.integers(6, 40))
    n_d = draw(st.integers(6, 32))
    gd = draw(st.integers(0, 2))
    td = draw(st.integers(0, 3))
    assume(2 * (gd + td) + 1 <= n_d)
    gr = draw(st.integers(0, 3))
    tr = draw(st.integers(0, 4))
    assume(tr + td >= 1)
    gate = draw(st.sampled_from([(None, None), (1, None), (None, n_r - 2), (2, n_r - 1)]))
    s = CfarSettings(kind="os", train_range=tr, guard_range=gr, train_doppler=td, guard_doppler=gd,
                     pfa=draw(st.sampled_from([1e-2, 1e-3, 1e-6])),
                     os_rank_fraction=draw(st.sampled_from([0.25, 0.5, 0.75, 0.9, 1.0])),
                     range_min_bin=gate[0], range_max_bin=gate[1])
    if td == 0:  # every range bin needs training rows outside its guard rows (a Cfar rule)
        assume(all(any(gr < abs(rr - r) <= gr + tr for rr in range(n_r)) for r in range(n_r)))
    k_int = draw(st.sampled_from([1, 4, 12]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    power = rng.gamma(k_int, size=(n_r, n_d))
    level = st.floats(-30.0, 40.0)
    for _ in range(draw(st.integers(0, 4))):
        r0, r1 = sorted(draw(st.lists(st.integers(0, n_r), min_size=2, max_size=2)))
        c0, c1 = sorted(draw(st.lists(st.integers(0, n_d), min_size=2, max_size=2)))
        power[r0:r1, c0:c1] *= 10 ** (draw(level) / 10)
    if draw(st.booleans()):
        power *= 10 ** (np.linspace(0.0, draw(level), n_r) / 10)[:, None]
    edge = draw(st.sampled_from(["none", "range", "doppler"]))
    if edge == "range":
        power[draw(st.integers(0, n_r)):] *= 10 ** (draw(level) / 10)
    elif edge == "doppler":
        power[:, draw(st.integers(0, n_d)):] *= 10 ** (draw(level) / 10)
    if draw(st.booleans()):
        power = np.ceil(power)
    for _ in range(draw(st.integers(0, 8))):
        r, j = rng.integers(0, n_r), rng.integers(0, n_d)
        power[r, j] *= 10 ** (rng.uniform(0.0, 30.0) / 10)
    return power.astype(np.float32), s, k_int


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(_clutter_case())
def test_os_detect_equals_brute_force_on_random_clutter(case):
    # Any clutter layout, including clutter over most of the map: the detections (and their noise
    # estimates) of Cfar.detect are those of the brute-force OS-CFAR, at the range edges too.
    power, s, k_int = case
    _check_against_brute_force(power, s, k_int)
