"""Subspace proposals for one snapshot: forward-backward spatial smoothing, then ESPRIT or MUSIC
(the `esprit` and `music` angle methods; step 6b of the angle module doc).

A single snapshot has a rank-one covariance, so a subspace method needs the covariance rebuilt from
the snapshot itself. The grid rows (virtual_grid.py) hold the cell values c (the calibrated channels
of a cell averaged); every run of L consecutive filled cells of one row is a subarray y_m (m = 1..M,
over all rows), and the forward-backward smoothed covariance (Shan, Wax and Kailath, "On spatial
smoothing for direction-of-arrival estimation of coherent signals", IEEE Trans. ASSP, 1985; the
forward-backward form: Pillai and Kwon, "Forward/backward spatial smoothing techniques for coherent
signal identification", IEEE Trans. ASSP, 1989) is

    R = 1 / (2 M) sum_m (y_m y_m^H + J conj(y_m) y_m^T J)        (J the L x L exchange matrix),

whose rank is up to min(L, 2 M): P < min(L, 2 M + 1) coherent plane waves (one snapshot makes every
pair coherent) get a P-dimensional signal subspace E_s, the eigenvectors of the P largest eigenvalues.
A plane wave of direction cosine u shifts by exp(-j k0 u pitch) from one cell to the next along x,
so (Roy and Kailath, "ESPRIT - estimation of signal parameters via rotational invariance
techniques", IEEE Trans. ASSP, 1989, least-squares form) with E_1, E_2 the first and last L - 1 rows
of E_s, the eigenvalues phi_p of Psi = (E_1^H E_1)^-1 E_1^H E_2 give u_p = -arg(phi_p) / (k0 pitch).
MUSIC (Schmidt, "Multiple emitter location and signal parameter estimation", IEEE Trans. AP, 1986)
takes instead the P highest local maxima of 1 / ||E_n^H a(u)||^2 over a scan of u (E_n the other
L - P eigenvectors, a(u) a subarray's steering vector).

Only azimuth (u) comes from the rows' shift invariance. Elevation: every proposed source starts at
the w of the snapshot's strongest kept source (a pair in one cell at one elevation is the common case;
one row: w = 0), and the deterministic maximum-likelihood refinement over the true element positions
(step 6, angle_joint.py) moves u and w of all sources jointly from there.

The estimates are proposals, not results: the estimator refines them by the joint DML iterations
(RELAX sweeps and Gauss-Newton on the P-source least squares over the true element positions, where
redundant and off-row channels count too) and keeps the larger set only when the split test
(angle_split.py) passes, so the model order, the design false-split rate and each source's
Cramer-Rao sigma are those of the dml method. The raw smoothed-subspace estimate is not reported: the
smoothing trades aperture (L < N cells) for rank, so with one snapshot its variance lies above the
bound the sigmas report (the refinement brings it to the bound).

Subarray length L (subarray_length): the longest filled run of a row gives N_r cells; L =
round(0.6 (N_r + 1)) (common practice for forward-backward smoothing puts L between N_r / 2 and
2 N_r / 3; measured on `bench --resolution`: 0.5, 0.6 and 0.7 resolve within 2 % of each other, 0.6
slightly best on the bundled array), at least 3. A snapshot is proposed sets of P = kept + 1 and
kept + 2 sources (one eigendecomposition; the second is tried as a jump where the first does not win)
only where P <= L - 1 (ESPRIT needs L - 1 >= P rows; MUSIC a noise subspace) and P <= 2 M (the
smoothed covariance's rank), and only when the set, at its unrefined directions, explains enough of
the kept set's misfit to be worth refining (the screen of subspace_proposals). An array whose rows have no run of 3 filled cells (holes everywhere,
one column) gets no proposals: the method is then dml (AngleEstimator.subspace_active says so).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .angle_joint import group_end

__all__ = ["subarray_length", "subarray_cells", "music_scan", "subspace_proposals", "MUSIC_SCAN_FACTOR"]

MUSIC_SCAN_FACTOR = 16  # MUSIC's scan of u: this many points per grid column (then refined by DML)
_MIN_SUBARRAY = 3


def subarray_length(counts: np.ndarray) -> int:
    """L for the grid's cell counts [n_z, n_x] (module doc), 0 when no row has a run of 3 filled cells."""
    longest = 0
    for row in counts:
        run = 0
        for c in row:
            run = run + 1 if c > 0 else 0
            longest = max(longest, run)
    if longest < _MIN_SUBARRAY:
        return 0
    return max(_MIN_SUBARRAY, min(longest, int(round(0.6 * (longest + 1)))))


def subarray_cells(counts: np.ndarray, cells: np.ndarray, length: int) -> np.ndarray:
    """int64[M, L]: the cell indices (rows of `cells`, the grid's occupied (iz, ix) in row-major
    order) of every run of `length` consecutive filled cells of one row, in increasing x."""
    index = -np.ones(counts.shape, np.int64)
    index[cells[:, 0], cells[:, 1]] = np.arange(cells.shape[0])
    out = []
    if length > 0:
        for iz in range(counts.shape[0]):
            for ix in range(counts.shape[1] - length + 1):
                run = index[iz, ix:ix + length]
                if np.all(run >= 0):
                    out.append(run)
    return np.array(out, np.int64).reshape(-1, max(length, 1))


@njit(cache=True)
def _smoothed_covariance(c, sub, r):
    """Forward-backward smoothed covariance (module doc) of the cell values c over the subarrays sub
    [M, L], into r [L, L]."""
    m_sub, n_l = sub.shape
    for i in range(n_l):
        for j in range(n_l):
            r[i, j] = 0.0
    for m in range(m_sub):
        for i in range(n_l):
            yi = c[sub[m, i]]
            yb = np.conj(c[sub[m, n_l - 1 - i]])  # backward: (J conj(y))_i
            for j in range(n_l):
                r[i, j] += yi * np.conj(c[sub[m, j]]) + yb * c[sub[m, n_l - 1 - j]]
    scale = 1.0 / (2.0 * m_sub)
    for i in range(n_l):
        for j in range(n_l):
            r[i, j] *= scale


@njit(cache=True)
def _esprit(es, k_pitch, out_u):
    """Least-squares ESPRIT (module doc) on the signal subspace es [L, P]: u of each source."""
    n_l, p = es.shape
    e1 = np.ascontiguousarray(es[: n_l - 1])
    e2 = np.ascontiguousarray(es[1:])
    e1h = np.ascontiguousarray(np.conj(e1.T))
    psi = np.linalg.solve(e1h @ e1, e1h @ e2)
    phi = np.linalg.eigvals(psi)
    for q in range(p):
        uq = -np.angle(phi[q]) / k_pitch
        out_u[q] = min(max(uq, -1.0), 1.0)


def music_scan(u_scan: np.ndarray, length: int, k_pitch: float) -> np.ndarray:
    """complex128[n_scan, L]: a subarray's steering vector exp(-j k0 pitch u (i - (L - 1) / 2)) at every u of
    MUSIC's scan (a table made once)."""
    i = np.arange(max(length, 1)) - 0.5 * (max(length, 1) - 1)
    return np.exp(-1j * k_pitch * np.outer(u_scan, i))


@njit(cache=True)
def _music(en, scan, u_scan, spec, out_u):
    """The P = out_u.size highest local maxima of 1 / ||E_n^H a(u)||^2 over u_scan (circular; scan: the
    steering table of music_scan); returns how many were found (fewer when the spectrum has fewer maxima)."""
    n_l, n_noise = en.shape
    n_scan = u_scan.size
    for s in range(n_scan):
        acc = 0.0
        for j in range(n_noise):
            v = 0.0j
            for i in range(n_l):
                v += np.conj(en[i, j]) * scan[s, i]
            acc += v.real * v.real + v.imag * v.imag
        spec[s] = 1.0 / max(acc, 1e-300)
    p = out_u.size
    best = np.full(p, -1.0)
    found = 0
    for s in range(n_scan):
        v = spec[s]
        if v <= spec[(s - 1) % n_scan] or v < spec[(s + 1) % n_scan]:
            continue
        # insert into the top-p list
        if found >= p and v <= best[p - 1]:
            continue
        q = min(found, p - 1)
        while q > 0 and best[q - 1] < v:
            best[q] = best[q - 1]
            out_u[q] = out_u[q - 1]
            q -= 1
        best[q] = v
        out_u[q] = u_scan[s]
        found = min(found + 1, p)
    return found


@njit(cache=True)
def _set_misfit(y, kx, kz, us, ws, p, a, gram, rhs):
    """||y - A c||^2 at the least-squares amplitudes c of the p plane waves (us, ws) over the true element
    phases kx u + kz w (A's columns a_q = exp(-j (kx u_q + kz w_q))): ||y||^2 - rhs^H G^-1 rhs with
    G = A^H A, rhs = A^H y (a small Gauss-Jordan solve; a singular G returns ||y||^2)."""
    n = y.size
    energy = 0.0
    for i in range(n):
        energy += y[i].real * y[i].real + y[i].imag * y[i].imag
    for q in range(p):
        for i in range(n):
            a[q, i] = np.exp(-1j * (kx[i] * us[q] + kz[i] * ws[q]))
    for q in range(p):
        acc = 0.0j
        for i in range(n):
            acc += np.conj(a[q, i]) * y[i]
        rhs[q] = acc
        for r in range(p):
            acc = 0.0j
            for i in range(n):
                acc += np.conj(a[q, i]) * a[r, i]
            gram[q, r] = acc
    sol = rhs[:p].copy()
    g = gram[:p, :p].copy()
    for c in range(p):  # Gauss-Jordan on the Hermitian positive (semi)definite G
        piv = g[c, c].real
        if piv <= 1e-9 * n:
            return energy
        for r in range(p):
            if r != c:
                f = g[r, c] / g[c, c]
                for k in range(p):
                    g[r, k] -= f * g[c, k]
                sol[r] -= f * sol[c]
    explained = 0.0
    for q in range(p):
        explained += (np.conj(rhs[q]) * sol[q] / g[q, q]).real
    return max(energy - explained, 0.0)


@njit(cache=True)
def subspace_proposals(snapshots, cal, chan_cell, cell_weight, n_cells, sub, k_pitch, use_music, u_scan, scan, kx, kz,
                       n_found, det, keep, w, open_slot, r_energy, q_need, crit, screen, floor_fraction, max_peaks,
                       new_n, new_u, new_w, jump_n, jump_u, jump_w):
    """For every snapshot d with open_slot[d] and K >= 1 kept peaks, the proposed sets of P = K + 1 (new_n[d] = P,
    new_u[d, :P], new_w[d, :P]) and of P = K + 2 sources (jump_n, jump_u, jump_w), each where P <= max_peaks
    and the subarrays sub [M, L] allow it (P <= L - 1, P <= 2 M), else a count of 0 (module doc: ESPRIT, or
    MUSIC when use_music, from one eigendecomposition; every w that of the snapshot's first kept peak, its
    strongest). chan_cell: each channel's cell; cell_weight: 1 / (channels in its cell); k_pitch: k0 * pitch
    (phase per unit u between neighbouring cells); u_scan, scan: MUSIC's scan and its steering table.

    Screens, as in angle_residual.py, at the unrefined directions (amplitudes by least squares over the true
    phases kx u + kz w): a set is proposed only when it explains at least the fraction q_need[d] of the kept
    set's misfit r_energy[d] (fit_residuals: the split test's need for one more source times the screen); the
    jump set also only when it explains, beyond the K + 1 set, screen * crit[K + 2] of what that leaves above
    the model-error floor (floor_fraction ||y||^2). Returns the number of snapshots with a proposal."""
    n_det, n_virt = snapshots.shape
    m_sub, n_l = sub.shape
    c = np.empty(n_cells, np.complex128)
    r = np.empty((n_l, n_l), np.complex128)
    uq = np.empty(max_peaks, np.float64)
    wq = np.empty(max_peaks, np.float64)
    spec = np.empty(u_scan.size, np.float64)
    y = np.empty(n_virt, np.complex128)
    a = np.empty((max_peaks, n_virt), np.complex128)
    gram = np.empty((max_peaks, max_peaks), np.complex128)
    rhs = np.empty(max_peaks, np.complex128)
    for d in range(n_det):
        new_n[d] = 0
        jump_n[d] = 0
    n_new = 0
    k0 = 0
    while k0 < n_found:
        k1 = group_end(det, n_found, k0)
        d = det[k0]
        kept = 0
        w0 = 0.0
        for k in range(k0, k1):
            if keep[k]:
                if kept == 0:
                    w0 = w[k]
                kept += 1
        p_max = min(max_peaks, n_l - 1, 2 * m_sub, kept + 2)
        if not open_slot[d] or kept == 0 or kept + 1 > p_max:
            k0 = k1
            continue
        energy = 0.0
        for i in range(n_cells):
            c[i] = 0.0
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * cal[i]
            c[chan_cell[i]] += y[i] * cell_weight[i]
            energy += y[i].real * y[i].real + y[i].imag * y[i].imag
        floor = floor_fraction * energy
        _smoothed_covariance(c, sub, r)
        _, vec = np.linalg.eigh(r)  # ascending eigenvalues
        e_one = np.inf
        for p in range(kept + 1, p_max + 1):
            if use_music:
                if _music(np.ascontiguousarray(vec[:, : n_l - p]), scan, u_scan, spec, uq[:p]) < p:
                    break
            else:
                _esprit(np.ascontiguousarray(vec[:, n_l - p:]), k_pitch, uq[:p])
            for q in range(p):
                wq[q] = w0
            e_p = _set_misfit(y, kx, kz, uq, wq, p, a, gram, rhs)
            if r_energy[d] - e_p < q_need[d] * r_energy[d]:
                continue
            if p == kept + 1:
                e_one = e_p
                new_n[d] = p
                for q in range(p):
                    new_u[d, q] = uq[q]
                    new_w[d, q] = w0
            else:
                # screened against the proposal of one more where that passed its screen
                if e_one < np.inf and (e_one <= floor or e_one - floor - e_p < screen * crit[p] * (e_one - floor)):
                    continue
                jump_n[d] = p
                for q in range(p):
                    jump_u[d, q] = uq[q]
                    jump_w[d, q] = w0
        if new_n[d] > 0 or jump_n[d] > 0:
            n_new += 1
        k0 = k1
    return n_new
