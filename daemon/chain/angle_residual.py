"""Residual search (step 7 of the angle module doc), as in CLEAN (Hogbom, "Aperture synthesis with
a non-regular distribution of interferometer baselines", Astron. Astrophys. Suppl., 1974).

A snapshot left with fewer than max_peaks peaks may hold a target the FFT stage did not separate
(a weak one under a strong one's beam or sidelobe, or two in-phase targets closer than the beam
width, which the FFT shows as one peak). The calibrated snapshot minus the joint least-squares fit
of its peaks (fit_residuals) is transformed as in steps 2-3 (same window); its strongest visible
grid point becomes a candidate (residual_peaks) when Fisher's statistic q = maximum beam power /
(n_cells * residual cell energy) (1 for a lone tone) reaches a fraction of the split test's
critical value: for the same candidate the test's g is at least q, so the screen passes what the
test could keep (angle_split.py) and saves the joint refinement of the rest. The estimator then
runs step 6 again on that snapshot, the candidate ranked last (in a pair the array cannot
separate, it is the one that goes), and the split test decides. One pass: at most one peak is added
per snapshot.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .angle_joint import group_end, joint_amplitudes, largest_group
from .angle_peaks import power_image
from .angle_refine import phasors

__all__ = ["fit_residuals", "residual_peaks"]

@njit(cache=True)
def fit_residuals(snapshots, cal, kx, kz, n_found, det, keep, u, w, max_peaks, resid, open_slot):
    """Step 7 (module doc), first half. For each snapshot with at least one and fewer than max_peaks
    kept peaks (open_slot[d] = True): resid[d] = the calibrated snapshot minus the joint
    least-squares fit of its kept peaks. Other snapshots: resid[d] = 0, open_slot[d] = False."""
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
        for a in range(n_act):
            for i in range(n_virt):
                y[i] -= amp[a] * ph[a, i].conjugate()
        for i in range(n_virt):
            resid[d, i] = y[i]
        open_slot[d] = True


@njit(cache=True)
def residual_peaks(fx, dft_z, n_det, visible_f, open_slot, n_cells, q_min, power, acc_re, acc_im, out_iz, out_ix):
    """Step 7, second half: for each open snapshot, the strongest visible point of its residual's
    beam image (fx: the residual's grid rows transformed along x), kept (out_iz, out_ix; -1 when
    not) when Fisher's statistic q = max beam power / (n_cells * residual energy) is at least q_min
    (Fisher, "Tests of significance in harmonic analysis", Proc. R. Soc. A, 1929; a lone tone gives
    1). The split test of the refit (angle_split.py) decides: g >= q for the same candidate, so q_min
    below the test's critical value lets through what the test could keep. Returns the number kept."""
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
        if biz < 0 or best < q_min * n_cells * energy:
            continue
        out_iz[d] = biz
        out_ix[d] = bix
        count += 1
    return count
