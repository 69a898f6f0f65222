"""The split test: is a further source there? (the decision of steps 6 and 7 of the angle module doc)

A snapshot y (n complex channels, white circular Gaussian noise of unknown power) explained by P - 1
plane waves leaves the least-squares misfit E_{P-1}; the P-source joint fit leaves E_P <= E_{P-1}.
The generalised likelihood ratio of P against P - 1 sources with the noise power unknown is
(E_{P-1} / E_P)^n (the noise power's maximum-likelihood estimate is the misfit over n), a
monotone function of the fraction of the misfit the P-th source explains,

    g = (E_{P-1} - E_P) / E_{P-1}     in [0, 1].

The P-th source is kept when g >= g_crit(P). The statistic is scale invariant, so the test needs no
noise power: a noise detection's snapshot is a white Gaussian vector selected by its energy, and the
direction of a white Gaussian vector is independent of its norm (so the selection leaves the test's
null distribution unchanged, where a test with the noise power known would see the selected energy
as a second source). The test assumes a calibrated array: channel errors leave a structured residual
that a strong target's test can take for a second source.

Critical value. Under the null (P - 1 sources) the misfit is, to first order, the noise projected
off the P - 1 fitted sources' tangent spaces: a white vector in N_r = 2 n - (2 + d)(P - 1) real
dimensions (d = 1 or 2 measured angles; each source fits a complex amplitude and d angles), whose
direction z is uniform on the unit sphere. With the P-th source's direction free, g is the maximum
over the manifold M = {phase rotations of the normalised steering vectors} of (m . z)^2, and the
Hotelling-Weyl volume of tubes gives (Hotelling, "Tubes and spheres in n-spaces, and a class of
statistical problems", Amer. J. Math., 1939; Weyl, "On the volume of tubes", Amer. J. Math., 1939;
the leading term, as in Knowles and Siegmund, "On Hotelling's approach to testing for a nonlinear
parameter in regression", Int. Stat. Rev., 1989)

    P(g >= x) ~= vol_{d+1}(M) / Omega_{d+2} * I_{1-x}((N_r - d - 2) / 2, (d + 2) / 2)

with Omega_k = 2 pi^(k/2) / Gamma(k/2) the area of the unit sphere in R^k and I the regularised
incomplete beta function (the upper tail of Beta((d + 2) / 2, (N_r - d - 2) / 2) at x). The manifold
is a circle (the amplitude's phase, length 2 pi) over every direction, so vol(M) = 2 pi * A, where
A is the visible region's area in the Fubini-Study metric of the normalised steering vector
a(u, w) / sqrt(n): with phase kx_i u + kz_i w on channel i that metric is the covariance over the
channels of (kx_i, kz_i), a constant, so A = sqrt(det cov) * (area of the visible region in (u, w),
counted once per grating period). The P - 1 fitted sources' own neighbourhoods are left in A (a
small overestimate, the test errs on the safe side) and so is the region's boundary term (the next
term of the tube formula, left out).

Model-error floor. The null above is P - 1 exact plane waves; a real snapshot also holds what the
array's model cannot explain (calibration residuals, the range and Doppler sidelobes of a neighbouring
echo), up to a fraction eps of the snapshot's energy, which a further source can take up. The test
therefore runs on the misfit with the floor F = eps ||y||^2 removed: the P-th source is kept when
(E_{P-1} - F - E_P) >= g_crit(P) (E_{P-1} - F), the white-noise test of what is left when a model error
of energy F sits in E_{P-1} and the further source takes all of it (never when E_{P-1} <= F). Where
noise dominates (F << E_{P-1}) it is the test above; on strong sources the floor decides.
(angle_joint.split_passes; eps from the setting angle_model_error_db, README.)

g_crit(P) solves P(g >= x) = alpha for the design false-split probability alpha; when N_r leaves no
room for another source (N_r <= d + 2), g_crit(P) = 2 (never passed). The array's geometry fixes the
area once, at construction.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special

__all__ = ["visible_area", "split_tail", "split_critical_values"]

_NEVER = 2.0  # a critical value g never reaches (g <= 1)


def _sphere_area(k: int) -> float:
    """Omega_k: the area of the unit sphere in R^k, 2 pi^(k/2) / Gamma(k/2)."""
    return 2.0 * math.pi ** (k / 2.0) / math.gamma(k / 2.0)


def visible_area(period_u: float, period_w: float, do_u: bool, do_w: bool, n_grid: int = 801) -> float:
    """Measure, in (u, w), of the visible directions u^2 + w^2 <= 1 counted once modulo the grating
    periods (period_u, period_w in direction cosine: wavelength / pitch): a disc of area pi for a
    pitch of at most half a wavelength. One measured angle: the length of [-1, 1] modulo the period.
    By a midpoint rule on one period cell (n_grid points a side) when the period is shorter than 2."""
    if do_u and do_w:
        if period_u >= 2.0 and period_w >= 2.0:
            return math.pi
        cu = (np.arange(n_grid) + 0.5) / n_grid * period_u - period_u / 2.0
        cw = (np.arange(n_grid) + 0.5) / n_grid * period_w - period_w / 2.0
        uu, ww = np.meshgrid(cu, cw, indexing="ij")
        seen = np.zeros(uu.shape, bool)
        ku = int(math.ceil(1.0 / period_u)) + 1
        kw = int(math.ceil(1.0 / period_w)) + 1
        for i in range(-ku, ku + 1):
            for j in range(-kw, kw + 1):
                seen |= (uu + i * period_u) ** 2 + (ww + j * period_w) ** 2 <= 1.0
        return float(seen.mean()) * period_u * period_w
    period = period_u if do_u else period_w
    return min(2.0, period)


def split_tail(x, area: float, n_virt: int, n_angles: int, n_fitted: int):
    """P(g >= x) by the leading tube term (module doc) for a further source after n_fitted sources,
    on an array of n_virt channels measuring n_angles angles, whose visible region has Fubini-Study
    measure `area` (length for one angle). 0 where the misfit leaves no room for another source."""
    d = n_angles
    n_r = 2 * n_virt - (2 + d) * n_fitted
    if n_r <= d + 2:
        return np.zeros_like(np.asarray(x, dtype=float))
    coef = 2.0 * math.pi * area / _sphere_area(d + 2)
    x = np.clip(np.asarray(x, dtype=float), 0.0, 1.0)
    return coef * special.betainc((n_r - d - 2) / 2.0, (d + 2) / 2.0, 1.0 - x)


def split_critical_values(kx: np.ndarray, kz: np.ndarray, period_u: float, period_w: float, do_u: bool,
                          do_w: bool, max_peaks: int, false_alarm: float) -> np.ndarray:
    """float64[max_peaks + 1]: g_crit(P) at index P for P = 2..max_peaks (module doc); entries 0 and 1
    unused (2). kx, kz: phase per unit direction cosine of every channel (2 pi / wavelength times its
    x and z position); do_u / do_w: which angles the array measures; periods: wavelength / pitch."""
    crit = np.full(max_peaks + 1, _NEVER)
    n_angles = int(do_u) + int(do_w)
    if n_angles == 0:
        return crit
    cols = [c for c, on in ((kx, do_u), (kz, do_w)) if on]
    cov = np.atleast_2d(np.cov(np.stack(cols), bias=True))
    area = math.sqrt(max(float(np.linalg.det(cov)), 0.0)) * visible_area(period_u, period_w, do_u, do_w)
    n_virt = int(kx.size)
    for p in range(2, max_peaks + 1):
        tail = lambda x, p=p: float(split_tail(x, area, n_virt, n_angles, p - 1)) - false_alarm
        if area > 0.0 and tail(0.0) > 0.0:  # else no room for a source, or a degenerate array
            crit[p] = optimize.brentq(tail, 0.0, 1.0, xtol=1e-12)
    return crit
