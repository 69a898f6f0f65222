"""Further sources for a snapshot with fewer than max_peaks kept (step 7 of the angle module doc).

fit_residuals: the calibrated snapshot minus the joint least-squares fit of its kept peaks.

residual_peaks, as in CLEAN (Hogbom, "Aperture synthesis with a non-regular distribution of
interferometer baselines", Astron. Astrophys. Suppl., 1974): the residual transformed as in steps
2-3 (same window); its strongest visible grid point is a candidate when Fisher's statistic q =
maximum beam power / (n_cells * residual cell energy) (1 for a lone tone) reaches a fraction of the
split test's critical value (for the same candidate the test's g is at least q). It finds a source
away from the kept ones (a weak one under a strong one's sidelobe).

further_sources, alternating projection (Ziskind and Wax, "Maximum likelihood localization of
multiple sources by alternating projection", IEEE Trans. ASSP, 1988) on the FFT grid: two sources
under one beam give one FFT peak between them, whose single-source fit leaves a residual no single
further direction explains well while the pair is held there. With B(theta) = a(theta)^H y the beam
of the snapshot on the grid (cell sums, no window) and a_i^H a_j = pattern[i - j] for grid
directions, the energy a source at theta adds to the projection of held sources A is
|B(theta) - g^H beta|^2 / (n - g^H G^-1 g), g = A^H a(theta), G = A^H A, beta = G^-1 A^H y, an O(P^2)
expression per grid point. The kept peaks start at their nearest grid directions; a new source goes
where it adds most (near a held one), then each source in turn moves (within half a Rayleigh
spacing) to where it adds most with the others held, until a sweep moves none. A set is proposed
when its grid misfit could pass the split test (a fraction of the critical value, as above); then
one more is tried, and the largest and the smallest passing sets are proposed. The estimator
refines them jointly (step 6) and the split test decides.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .angle_joint import _MISFIT_FLOOR, group_end, joint_amplitudes, largest_group
from .angle_peaks import power_image
from .angle_refine import phasors

__all__ = ["fit_residuals", "residual_peaks", "beam_image", "further_sources"]

_MAX_SWEEPS = 6  # alternating-projection sweeps over the sources on the grid

@njit(cache=True)
def fit_residuals(snapshots, cal, kx, kz, n_found, det, keep, u, w, max_peaks, crit, floor_fraction, screen, resid,
                  y_energy, r_energy, q_need, open_slot):
    """Step 7 (module doc), first half, one pass over the snapshots. For every snapshot d: y_energy[d] =
    ||y_d||^2 of the calibrated snapshot; for one with at least one and fewer than max_peaks kept peaks,
    resid[d] = y_d minus the joint least-squares fit of its kept peaks and r_energy[d] = ||resid[d]||^2
    (else resid[d] = 0, r_energy[d] = 0).

    open_slot[d] (returned: their count) says whether one more source could pass the split test
    (angle_joint.split_passes, P = kept + 1): it needs E_{P-1} > F and E_{P-1} - F - E_P >= crit[P]
    (E_{P-1} - F), F = floor_fraction ||y||^2 (at least _MISFIT_FLOOR of it), so it cannot pass when
    E_{P-1} <= F or crit[P] >= 1 (E_P >= 0): such a snapshot (a strong lone source whose misfit is
    model error and noise below the floor, or no room for another source) is closed without a search.
    q_need[d] = screen (crit[P] + (1 - crit[P]) F / E_{P-1}): the fraction of the misfit a further
    source's proposal must explain to be tried (the test's, times the screen)."""
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
    frac = max(floor_fraction, _MISFIT_FLOOR)
    for d in range(n_det):
        open_slot[d] = False
        r_energy[d] = 0.0
        q_need[d] = np.inf
        acc = 0.0
        for i in range(n_virt):
            resid[d, i] = 0
            v = complex(snapshots[d, i]) * cal[i]
            acc += v.real * v.real + v.imag * v.imag
        y_energy[d] = acc
    n_open = 0
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
        e = 0.0
        for i in range(n_virt):
            resid[d, i] = y[i]
            e += y[i].real * y[i].real + y[i].imag * y[i].imag
        r_energy[d] = e
        c = crit[min(n_act + 1, crit.size - 1)]
        floor = frac * y_energy[d]
        if e > floor and c < 1.0:
            open_slot[d] = True
            q_need[d] = screen * (c + (1.0 - c) * floor / e)
            n_open += 1
    return n_open


@njit(cache=True)
def residual_peaks(fx, dft_z, n_det, visible_f, open_slot, n_cells, q_need, power, acc_re, acc_im, out_iz, out_ix):
    """Step 7, second half: for each open snapshot, the strongest visible point of its residual's
    beam image (fx: the residual's grid rows transformed along x), kept (out_iz, out_ix; -1 when
    not) when Fisher's statistic q = max beam power / (n_cells * residual energy) is at least
    q_need[d] (Fisher, "Tests of significance in harmonic analysis", Proc. R. Soc. A, 1929; a lone
    tone gives 1). The split test of the refit (angle_split.py) decides: g >= q for the same
    candidate, so q_need below what the test needs (fit_residuals) lets through what the test could
    keep. Returns the number kept."""
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
        if biz < 0 or best < q_need[d] * n_cells * energy:
            continue
        out_iz[d] = biz
        out_ix[d] = bix
        count += 1
    return count


@njit(cache=True)
def beam_image(fx, dft_z, d, out):
    """out[kz, kx] = sum_iz dft_z[kz, iz] fx[iz, d, kx]: the complex beam a^H y of snapshot d at every
    grid direction (fx: its grid rows transformed along x, the cells holding channel sums)."""
    nz, nx = out.shape
    for iz in range(nz):
        for ix in range(nx):
            out[iz, ix] = 0j
        for r in range(fx.shape[0]):
            c = complex(dft_z[iz, r])
            row = fx[r, d]
            for ix in range(nx):
                out[iz, ix] += c * complex(row[ix])


@njit(cache=True)
def _gram_inverse(pattern, iz, ix, n_src, skip, gi, tmp):
    """gi = inverse of the Gram matrix G_ab = a_a^H a_b = pattern[iz_a - iz_b, ix_a - ix_b] of the grid
    sources 0..n_src-1 but `skip` (Gauss-Jordan on at most a few sources). Returns the count m, or
    -1 when G is singular."""
    nz, nx = pattern.shape[0] // 2, pattern.shape[1] // 2  # the pattern tiled 2 x 2
    m = 0
    for a in range(n_src):
        if a == skip:
            continue
        b2 = 0
        for b in range(n_src):
            if b == skip:
                continue
            tmp[m, b2] = pattern[iz[a] - iz[b] + nz, ix[a] - ix[b] + nx]
            b2 += 1
        m += 1
    for a in range(m):
        for b in range(m):
            gi[a, b] = 1.0 + 0j if a == b else 0j
    for c in range(m):
        piv = tmp[c, c]
        if abs(piv) <= 1e-9 * abs(pattern[0, 0]):
            return -1
        for b in range(m):
            tmp[c, b] /= piv
            gi[c, b] /= piv
        for a in range(m):
            if a != c:
                f = tmp[a, c]
                for b in range(m):
                    tmp[a, b] -= f * tmp[c, b]
                    gi[a, b] -= f * gi[c, b]
    return m


@njit(cache=True)
def _scan(centre, reach, n, out):
    """The indices centre - reach .. centre + reach modulo n (all of 0..n-1 when reach < 0 or the span
    covers them) into out; returns their count."""
    if reach < 0 or 2 * reach + 1 >= n:
        for j in range(n):
            out[j] = j
        return n
    for k in range(2 * reach + 1):
        out[k] = (centre - reach + k) % n
    return 2 * reach + 1


@njit(cache=True)
def _best_position(img, pattern2, visible_f, iz, ix, n_src, skip, gi, tmp, beta, h, d_min, reach_z, reach_x,
                   rows, cols):
    """Alternating-projection step: with the grid sources 0..n_src-1 but `skip` held, the grid direction
    theta (visible, n / D(theta) at most the variance-inflation limit) maximising the energy a source
    there adds to the held ones' projection, |a^H r|^2 / D with r = y - A beta the residual of their
    least-squares fit and D = n - g^H G^-1 g, g_b = a_b^H a (theta) (the part of a(theta) they do not
    explain). pattern2 is the pattern tiled 2 x 2 (no modulo in the loop). Searched: within reach_z
    rows and reach_x columns of the moving source; for a new one (skip < 0) within twice that of any
    held source (a source farther out is the residual search's: residual_peaks). rows, cols: scratch.
    Returns (that energy, iz, ix); (-1, -1, -1) when none qualifies."""
    nz, nx = img.shape
    m = _gram_inverse(pattern2, iz, ix, n_src, skip, gi, tmp)
    if m < 0:
        return -1.0, -1, -1
    # beta = G^-1 A^H y, A^H y the beam at the held sources
    held = 0
    for a in range(n_src):
        if a != skip:
            h[held] = img[iz[a], ix[a]]
            held += 1
    for a in range(m):
        acc = 0j
        for b in range(m):
            acc += gi[a, b] * h[b]
        beta[a] = acc
    n = pattern2[0, 0].real
    best, bz, bx = -1.0, -1, -1
    if skip >= 0:
        n_rows, n_cols = _scan(iz[skip], reach_z, nz, rows), _scan(ix[skip], reach_x, nx, cols)
        return _scan_best(img, pattern2, visible_f, iz, ix, n_src, skip, gi, h, beta, m, n, d_min, rows, n_rows,
                          cols, n_cols, best, bz, bx)
    for c in range(n_src):  # a new source: near any held one
        n_rows, n_cols = _scan(iz[c], 2 * reach_z, nz, rows), _scan(ix[c], 2 * reach_x, nx, cols)
        best, bz, bx = _scan_best(img, pattern2, visible_f, iz, ix, n_src, skip, gi, h, beta, m, n, d_min, rows,
                                  n_rows, cols, n_cols, best, bz, bx)
    return best, bz, bx


@njit(cache=True)
def _scan_best(img, pattern2, visible_f, iz, ix, n_src, skip, gi, h, beta, m, n, d_min, rows, n_rows, cols, n_cols,
               best, bz, bx):
    """The scan of _best_position over the grid points rows x cols; returns the best (energy, iz, ix)
    of these and the one passed in."""
    nz, nx = img.shape
    for r_k in range(n_rows):
        jz = rows[r_k]
        for c_k in range(n_cols):
            jx = cols[c_k]
            if visible_f[jz, jx] == 0.0:
                continue
            # g_b = a_b^H a(theta) = pattern[b - theta]; a(theta)^H A beta = sum_b conj(g_b) beta_b
            held = 0
            r = img[jz, jx]
            for a in range(n_src):
                if a != skip:
                    h[held] = pattern2[iz[a] - jz + nz, ix[a] - jx + nx]
                    r -= h[held].conjugate() * beta[held]
                    held += 1
            if m == 1:
                quad = gi[0, 0].real * (h[0].real * h[0].real + h[0].imag * h[0].imag)
            else:
                quad = 0.0
                for a in range(m):
                    acc = 0j
                    for b in range(m):
                        acc += gi[a, b] * h[b]
                    quad += (h[a].conjugate() * acc).real
            den = n - quad
            if den < d_min:
                continue
            e = (r.real * r.real + r.imag * r.imag) / den
            if e > best:
                best, bz, bx = e, jz, jx
    return best, bz, bx


@njit(cache=True)
def _sweeps(img, pattern, visible_f, iz, ix, n_src, gi, tmp, beta, h, d_min, reach_z, reach_x, rows, cols):
    """Alternating projection: each grid source in turn to its best direction with the others held
    (_best_position), until a sweep moves none (at most _MAX_SWEEPS)."""
    for _ in range(_MAX_SWEEPS):
        moved = False
        for a in range(n_src):
            e, bz, bx = _best_position(img, pattern, visible_f, iz, ix, n_src, a, gi, tmp, beta, h, d_min, reach_z,
                                       reach_x, rows, cols)
            if bz >= 0 and (bz != iz[a] or bx != ix[a]):
                iz[a] = bz
                ix[a] = bx
                moved = True
        if not moved:
            break


@njit(cache=True)
def _explained(img, pattern, iz, ix, n_src, gi, tmp, h):
    """||P_A y||^2 = b^H G^-1 b of the grid sources 0..n_src-1 (b their beams): the energy their joint
    least-squares fit explains; -1 when G is singular."""
    m = _gram_inverse(pattern, iz, ix, n_src, -1, gi, tmp)
    if m < 0:
        return -1.0
    for a in range(m):
        h[a] = img[iz[a], ix[a]]
    acc = 0.0
    for a in range(m):
        s = 0j
        for b in range(m):
            s += gi[a, b] * h[b]
        acc += (h[a].conjugate() * s).real
    return acc


@njit(cache=True)
def further_sources(fx, dft_z, pattern, visible_f, n_det, open_slot, n_found, det, keep, u, w, u_grid, w_grid,
                    energy, resid_energy, crit, screen, floor_fraction, d_min, reach_z, reach_x, res_iz, res_ix, img,
                    out_n, out_u, out_w, first_n, first_u, first_w):
    """Step 7, second half: alternating projection on the grid (module doc) for every open snapshot.

    fx: the calibrated snapshots' grid rows (cell sums) transformed along x; pattern[dz, dx] = sum of
    the cell counts times exp(+j 2 pi (dz iz / n_fft_z + dx ix / n_fft_x)), so that a_i^H a_j =
    pattern[i - j] for grid directions i, j; energy[d] = ||y_d||^2, resid_energy[d] = the misfit of
    its kept peaks' joint fit (fit_residuals); crit[P] the split test's critical value of the P-th
    source and floor_fraction its model-error floor F = floor_fraction energy[d] (split_passes);
    d_min = n_virt / (the variance-inflation limit). The kept peaks start at their nearest
    grid directions, the further one where it explains most with them held; then each source in
    turn moves to its best grid direction with the others held, until a sweep moves none (at most
    _MAX_SWEEPS). The set is a candidate when its grid misfit E_P leaves resid_energy - E_P >= screen *
    (c resid_energy + (1 - c) F), c = crit[P + 1] (a fraction of what the test needs): out_n[d] = P + 1 and out_iz[d, :P + 1], out_ix[d, :P + 1]
    its grid directions, the kept peaks first in their order; else out_n[d] = 0. Returns the number
    of candidates."""
    nz, nx = pattern.shape[0] // 2, pattern.shape[1] // 2  # the pattern tiled 2 x 2
    mp = out_u.shape[1]
    rows = np.empty(nz, np.int64)
    cols = np.empty(nx, np.int64)
    bin_u = u_grid[1] - u_grid[0] if nx > 1 else 1.0
    bin_w = w_grid[1] - w_grid[0] if nz > 1 else 1.0
    iz = np.empty(mp, np.int64)
    ix = np.empty(mp, np.int64)
    gi = np.empty((mp, mp), np.complex128)
    tmp = np.empty((mp, mp), np.complex128)
    beta = np.empty(mp, np.complex128)
    h = np.empty(mp, np.complex128)
    for d in range(n_det):
        out_n[d] = 0
        first_n[d] = 0
    count = 0
    k0 = 0
    while k0 < n_found:
        k1 = group_end(det, n_found, k0)
        d = det[k0]
        k_first = k0
        n_src = 0
        for k in range(k0, k1):
            if keep[k] and n_src < mp - 1:
                iz[n_src] = int(round(w[k] / bin_w)) % nz if nz > 1 else 0
                ix[n_src] = int(round(u[k] / bin_u)) % nx if nx > 1 else 0
                n_src += 1
        k0 = k1
        n_kept = n_src
        if not open_slot[d] or n_src == 0 or not resid_energy[d] > 0.0:
            continue
        beam_image(fx, dft_z, d, img)
        n_out = 0
        e_prev = resid_energy[d]
        floor = max(floor_fraction, _MISFIT_FLOOR) * energy[d]
        while n_src < mp:
            e, bz, bx = _best_position(img, pattern, visible_f, iz, ix, n_src, -1, gi, tmp, beta, h, d_min, reach_z,
                                       reach_x, rows, cols)
            if bz < 0:
                break
            iz[n_src] = bz
            ix[n_src] = bx
            n_src += 1
            _sweeps(img, pattern, visible_f, iz, ix, n_src, gi, tmp, beta, h, d_min, reach_z, reach_x, rows, cols)
            explained = _explained(img, pattern, iz, ix, n_src, gi, tmp, h)
            if explained < 0.0:
                break
            e_now = max(energy[d] - explained, 0.0)
            c = crit[min(n_src, crit.size - 1)]
            if e_prev - e_now >= screen * (c * e_prev + (1.0 - c) * floor):
                # this many could pass: the largest such set is proposed, and the smallest
                if n_out == 0:
                    first_n[d] = n_src
                    for a in range(n_src):
                        first_u[d, a] = u_grid[ix[a]]
                        first_w[d, a] = w_grid[iz[a]]
                n_out = n_src
                for a in range(n_src):
                    out_u[d, a] = u_grid[ix[a]]
                    out_w[d, a] = w_grid[iz[a]]
            else:
                break  # one more only after this one (at high SNR the grid's own misfit would pass it)
            e_prev = e_now
            if e_prev <= floor or crit[min(n_src + 1, crit.size - 1)] >= 1.0:
                break  # the next one could not pass (fit_residuals; the refined misfit is at most e_prev)
        if n_out == 0 and res_iz[d] >= 0:
            # the residual's own peak passed its screen: the kept peaks as they are, and it
            a = 0
            for k in range(k_first, k0):
                if keep[k] and a < n_kept:
                    out_u[d, a] = u[k]
                    out_w[d, a] = w[k]
                    a += 1
            n_out = n_kept + 1
            out_u[d, n_kept] = u_grid[res_ix[d]]
            out_w[d, n_kept] = w_grid[res_iz[d]]
            first_n[d] = n_out
            for a in range(n_out):
                first_u[d, a] = out_u[d, a]
                first_w[d, a] = out_w[d, a]
        if n_out > 0:
            out_n[d] = n_out
            count += 1
    return count
