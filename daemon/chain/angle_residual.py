"""Residual search (step 7 of the angle module doc), as in CLEAN (Hogbom, "Aperture synthesis with
a non-regular distribution of interferometer baselines", Astron. Astrophys. Suppl., 1974).

A snapshot left with fewer than max_peaks peaks may hold a target the FFT stage did not separate
(a weak one under a strong one's beam or sidelobe). The calibrated snapshot minus the joint
least-squares fit of its peaks (fit_residuals) is transformed as in steps 2-3 (same window); its
strongest visible grid point joins the peaks (residual_peaks) when (a) its power is at least
peak_threshold_db of the strongest peak's |a|^2 on the same scale and (b) the residual is one tone
rather than noise by Fisher's g test (g = maximum beam power / (n_cells * residual cell energy),
1 for a lone tone; critical value at RESIDUAL_FALSE_ALARM per snapshot from the first term of
Fisher's 1929 series, fisher_g_critical). The estimator then runs step 6 again on that snapshot,
the new peak ranked last (in a pair the array cannot separate, it is the one that goes). One pass:
at most one peak is added per snapshot.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .angle_joint import group_end, joint_amplitudes, largest_group
from .angle_peaks import power_image
from .angle_refine import phasors

__all__ = ["RESIDUAL_FALSE_ALARM", "fisher_g_critical", "fit_residuals", "residual_peaks"]

# chance that noise alone passes Fisher's g test in one snapshot's residual (nominal: the
# zero-padded grid's maximum runs a little above the independent bins' the test assumes)
RESIDUAL_FALSE_ALARM = 1e-3


def fisher_g_critical(n_cells: int, false_alarm: float = RESIDUAL_FALSE_ALARM) -> float:
    """Critical value of Fisher's g for n_cells grid cells at the given false-alarm chance:
    g_crit = 1 - (alpha / n)^(1 / (n - 1)), the first term of Fisher's series (Fisher, "Tests of
    significance in harmonic analysis", Proc. R. Soc. A, 1929). 2 (never passed) for one cell."""
    return 1.0 - (false_alarm / n_cells) ** (1.0 / (n_cells - 1)) if n_cells > 1 else 2.0


@njit(cache=True)
def fit_residuals(snapshots, cal, kx, kz, n_found, det, keep, u, w, max_peaks, resid, open_slot, top_amp2):
    """Step 7 (module doc), first half. For each snapshot with at least one and fewer than max_peaks
    kept peaks (open_slot[d] = True): resid[d] = the calibrated snapshot minus the joint
    least-squares fit of its kept peaks, and top_amp2[d] = the largest |amplitude|^2 of that fit.
    Other snapshots: resid[d] = 0, open_slot[d] = False."""
    n_det, n_virt = snapshots.shape
    mp = largest_group(det, n_found)
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
        k1 = group_end(det, n_found, k0)
        n_act = 0
        for k in range(k0, k1):
            if keep[k]:
                act[n_act] = n_act
                phasors(kx, kz, u[k], w[k], ph[n_act])
                n_act += 1
        d = det[k0]
        k0 = k1
        if n_act == 0 or n_act >= max_peaks:
            continue
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * cal[i]
        if not joint_amplitudes(ph, act, n_act, y, gram, rhs, work, amp, vif):
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
def residual_peaks(fx, dft_z, n_det, visible_f, open_slot, top_amp2, beam_gain2, rel_thr, n_cells, g_crit,
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
        power_image(fx, dft_z, d, power, acc_re, acc_im)
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
