"""Joint refinement of the peaks of one snapshot (step 6 of the angle module doc).

Runs on a snapshot left with P >= 2 peaks after the single-target refinement (angle_refine.py),
each of which that fit pulls towards the others. With y the calibrated snapshot and S the P
steering vectors on the actual element positions, the criterion is the P-target least-squares
misfit ||y - S a||^2 with the amplitudes a at their joint least-squares value (S^H S)^-1 S^H y:

- RELAX sweeps (Li and Stoica, "Efficient mixed-spectrum estimation with applications to
  target feature extraction", IEEE Trans. SP, 1996): for each peak i, subtract the others'
  fits, y - sum_{j != i} a_j S_j, refine peak i as a single target on that residual with the
  Newton iteration of step 5 (window applied to the residual; the full iteration on the
  first sweep, one step on later ones), refit all amplitudes jointly; at most 8 sweeps,
  fewer when no peak moves by more than 0.01 FFT bin in a sweep;
- then joint Gauss-Newton (Levenberg-Marquardt) steps on all P directions at once, up to
  20, until the step is below 1e-4 FFT bin. The cyclic sweeps alone converge slowly when
  peaks are close (antiphase targets half a Rayleigh spacing apart are still ~40 % off
  after 30 sweeps); the joint steps converge quadratically from where the sweeps stop. They
  minimise the unweighted misfit: the window shapes only the FFT stage and the sweeps.

After every amplitude fit a peak is dropped (and the rest refitted) when the array cannot tell it
from the others: variance inflation n_virt * ((S^H S)^-1)_ii above 10 (for a pair, a normalised
steering correlation above ~0.95), in which case the weaker of the inflated peaks goes, so peaks
that converge onto each other merge into the stronger; and, from the second sweep on (once every
peak has had its own refinement), when it explains too little of the misfit to be near passing
the split test (a sidelobe or a ghost of another peak, which the others' fits explain; a noise
peak): with the angles held its removal would raise the misfit by less than `screen` times what
the test needs. After a drop the sweeps and joint steps run again (at most 3 rounds).

Then the split test (angle_split.py) decides, from the most peaks down: the P-th peak stays when
it explains at least the fraction g_crit(P) of the misfit the P - 1 others leave (refined again
without it; for P = 2 the best single plane wave), beyond what the array's model error could put
there (the floor: a set fraction of the snapshot's energy, angle_split.py). A failed test leaves
the smaller set, tested in turn. Reported powers are |a_i|^2 * n_virt (the scale of a lone
target's beam power). If a single peak survives, its step-5 result is reported unchanged.
Noiseless data of P plane waves fit with zero residual at the truth (the global minimum, reached
in every case tested); in noise the result is a local minimum of the misfit, i.e. the P-target
deterministic maximum-likelihood estimate when that minimum is the global one.

Cost: about 10 us per two-peak snapshot on the bundled sensor (on average 4 sweeps and 2
joint steps), less for a noise peak the screen drops after the first sweep, growing steeply with
P (every peak update refits all P amplitudes; the test of P >= 3 refines the P - 1 set again).

Peak arrays are grouped by snapshot: det[k] is the snapshot of peak k, a snapshot's peaks are
consecutive (group_end, largest_group).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .angle_refine import MAX_NEWTON_ITERATIONS, newton_refine, phasors

__all__ = ["group_end", "largest_group", "joint_amplitudes", "relax_peaks"]

_MAX_RELAX_SWEEPS = 8
_RELAX_MOVE_TOL = 1e-2  # FFT bins: a sweep in which no peak moves further ends the sweeps
_RELAX_FIRST_NEWTON_ITERATIONS = MAX_NEWTON_ITERATIONS  # the full step-5 iteration on the first sweep
_RELAX_NEWTON_ITERATIONS = 1  # Newton steps per peak on the sweeps after the first
_RELAX_TRUST_BINS = 1e-6  # FFT bins: smaller Newton steps skip the power check (rounding level)
_MAX_VARIANCE_INFLATION = 10.0  # a pair with steering correlation above ~0.95 merges
_GRAM_RELATIVE_FLOOR = 1e-9  # Cholesky pivot floor relative to n_virt: singular Gram matrix
_MAX_JOINT_ITERATIONS = 20  # joint Gauss-Newton iterations after the sweeps
_JOINT_STEP_TOL = 1e-4  # FFT bins: a smaller step ends the joint iterations
_MAX_RELAX_ROUNDS = 3  # sweeps + joint iterations again after a peak was dropped
# a misfit below this fraction of the snapshot's energy is float32 rounding (about 1e-14 of it for a
# noiseless float32 snapshot): the split test's model-error floor is never set below it (split_passes).
# Reached by a single source only above about 90 dB per channel.
_MISFIT_FLOOR = 1e-9


@njit(cache=True, inline="always")
def group_end(det, n_found, k0):
    """One past the last peak of the snapshot of peak k0 (det: snapshot of each peak, grouped)."""
    k1 = k0 + 1
    while k1 < n_found and det[k1] == det[k0]:
        k1 += 1
    return k1


@njit(cache=True)
def largest_group(det, n_found):
    """The largest number of peaks of one snapshot (det: snapshot of each peak, grouped); at least 1."""
    mp = 1
    k0 = 0
    while k0 < n_found:
        k1 = group_end(det, n_found, k0)
        mp = max(mp, k1 - k0)
        k0 = k1
    return mp


@njit(cache=True)
def joint_amplitudes(ph, act, n_act, y, gram, rhs, work, amp, vif):
    """Least-squares amplitudes of the active peaks: amp = (S^H S)^-1 S^H y, where the columns
    of S are the steering vectors conj(ph[act[a]]) (ph holds phasors, see phasors), by a
    Cholesky factorisation G = L L^H of the Gram matrix G = S^H S. Writes amp[act[a]] and the
    variance inflation vif[act[a]] = n_virt * (G^-1)_aa: how much larger the variance of the
    joint amplitude is than that of a lone target (1 for orthogonal steering vectors, 1 / (1 -
    rho^2) for a pair with normalised correlation rho). Returns False (amp, vif untouched) when
    G is numerically singular, i.e. two active directions are indistinguishable on this array."""
    n_virt = y.size
    for a in range(n_act):
        pa = act[a]
        acc = 0j
        for i in range(n_virt):
            acc += ph[pa, i] * y[i]
        rhs[a] = acc
        for b in range(a, n_act):
            pb = act[b]
            acc = 0j
            for i in range(n_virt):
                acc += ph[pa, i] * ph[pb, i].conjugate()
            gram[a, b] = acc
            gram[b, a] = acc.conjugate()
    # Cholesky G = L L^H in the lower triangle of gram
    for a in range(n_act):
        diag = gram[a, a].real
        for c in range(a):
            diag -= gram[a, c].real ** 2 + gram[a, c].imag ** 2
        if diag <= _GRAM_RELATIVE_FLOOR * n_virt:
            return False
        lad = math.sqrt(diag)
        gram[a, a] = lad
        for b in range(a + 1, n_act):
            acc = gram[b, a]
            for c in range(a):
                acc -= gram[b, c] * gram[a, c].conjugate()
            gram[b, a] = acc / lad
    # forward (L z = rhs) and backward (L^H amp = z) substitution
    for a in range(n_act):
        acc = rhs[a]
        for c in range(a):
            acc -= gram[a, c] * rhs[c]
        rhs[a] = acc / gram[a, a].real
    for a in range(n_act - 1, -1, -1):
        acc = rhs[a]
        for c in range(a + 1, n_act):
            acc -= gram[c, a].conjugate() * rhs[c]
        rhs[a] = acc / gram[a, a].real
    for a in range(n_act):
        amp[act[a]] = rhs[a]
    # (G^-1)_aa = sum_k |(L^-1)_ka|^2; column a of L^-1 by forward substitution of L z = e_a
    for a in range(n_act):
        acc2 = 0.0
        for k in range(a, n_act):
            acc = 1.0 + 0j if k == a else 0j
            for c in range(a, k):
                acc -= gram[k, c] * work[c]
            work[k] = acc / gram[k, k].real
            acc2 += work[k].real ** 2 + work[k].imag ** 2
        vif[act[a]] = n_virt * acc2
    return True


@njit(cache=True)
def _drop_active(act, n_act, a):
    for b in range(a, n_act - 1):
        act[b] = act[b + 1]
    return n_act - 1


@njit(cache=True)
def _prune_hopeless(ph, act, n_act, y, amp, vif, crit, screen, floor):
    """Drop the active peak least worth keeping when it cannot be near passing the split test: with
    the angles held, removing peak p raises the misfit E by n_virt |amp_p|^2 / vif_p (ordinary least
    squares: beta_p^2 / (X^H X)^-1_pp), and the test (split_passes: rise - floor >= crit (E + rise -
    floor)) needs a rise of at least crit E / (1 - crit) + floor; below `screen` times that the peak
    goes. Returns the new count (one peak always stays)."""
    c = crit[n_act] if n_act < crit.size else crit[crit.size - 1]
    if c >= 1.0:
        need = np.inf
    else:
        need = screen * (c * _residual_cost(y, ph, act, n_act, amp) / (1.0 - c) + floor)
    worst = -1
    least = np.inf
    for a in range(n_act):
        q = amp[act[a]]
        rise = y.size * (q.real * q.real + q.imag * q.imag) / vif[act[a]]
        if rise < least:
            least = rise
            worst = a
    if least < need:
        return _drop_active(act, n_act, worst)
    return n_act


@njit(cache=True)
def _weakest_active(act, n_act, rank, vif, max_vif):
    """Position in act of the lowest-ranked peak among those with vif > max_vif (among all
    when max_vif < 0); -1 if none."""
    worst = -1
    pw = np.inf
    for a in range(n_act):
        p = act[a]
        if (max_vif < 0.0 or vif[p] > max_vif) and rank[p] < pw:
            pw = rank[p]
            worst = a
    return worst


@njit(cache=True)
def _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif, rank, crit, screen, floor, max_vif):
    """Joint least-squares amplitudes of the active peaks, dropping peaks until the set is
    resolvable and every peak is strong enough, refitting after every drop:
    - singular Gram matrix: the lowest-ranked peak goes;
    - variance inflation above max_vif (directions the array cannot tell apart, e.g. two peaks
      that converged onto each other): the lowest-ranked of the inflated peaks goes, i.e. they
      merge into the higher-ranked one;
    - a peak whose removal costs too little of the misfit to be near passing the split test
      (_prune_hopeless) goes.
    rank is the single-target beam power of step 5: joint amplitudes of nearly collinear
    steering vectors are unreliable (two of them with large opposite amplitudes can fit noise,
    the two-target likelihood then pulls a true peak onto a noise peak), so they do not decide
    which peak of such a set survives. Returns (n_act, dropped_any); n_act >= 1."""
    dropped = False
    while True:
        while not joint_amplitudes(ph, act, n_act, y, gram, rhs, work, amp, vif):
            n_act = _drop_active(act, n_act, _weakest_active(act, n_act, rank, vif, -1.0))
            dropped = True
        if n_act == 1:
            return n_act, dropped
        worst = _weakest_active(act, n_act, rank, vif, max_vif)
        if worst >= 0:
            n_act = _drop_active(act, n_act, worst)
            dropped = True
            continue
        n_new = _prune_hopeless(ph, act, n_act, y, amp, vif, crit, screen, floor)
        if n_new == n_act:
            return n_act, dropped
        n_act = n_new
        dropped = True


@njit(cache=True)
def _residual_cost(y, ph, act, n_act, amp):
    """||y - sum_a amp[act[a]] conj(ph[act[a]])||^2: the misfit of the joint model."""
    c = 0.0
    for i in range(y.size):
        r = y[i]
        for a in range(n_act):
            q = act[a]
            r -= amp[q] * ph[q, i].conjugate()
        c += r.real * r.real + r.imag * r.imag
    return c


@njit(cache=True)
def _damped_solve(h, g, n, lam, chol, out):
    """Solve (h + lam * diag(h)) x = g for the symmetric positive definite n x n leading block
    of h by a Cholesky factorisation in chol. Returns False if not positive definite."""
    for a in range(n):
        s = h[a, a] * (1.0 + lam)
        for c in range(a):
            s -= chol[a, c] * chol[a, c]
        if not s > 0.0:
            return False
        lad = math.sqrt(s)
        chol[a, a] = lad
        for b in range(a + 1, n):
            t = h[b, a]
            for c in range(a):
                t -= chol[b, c] * chol[a, c]
            chol[b, a] = t / lad
    for a in range(n):
        t = g[a]
        for c in range(a):
            t -= chol[a, c] * out[c]
        out[a] = t / chol[a, a]
    for a in range(n - 1, -1, -1):
        t = out[a]
        for c in range(a + 1, n):
            t -= chol[c, a] * out[c]
        out[a] = t / chol[a, a]
    return True


@njit(cache=True)
def _normal_equations(y, kx, kz, act, n_act, ph, amp, res, jac, hess, grad, do_u, do_w, per):
    """Gauss-Newton normal equations of the misfit at the current point: jac, the Jacobian of
    mu = sum_p amp_p conj(ph_p) in (u, w, Re a, Im a) of every active peak (per columns each, the
    angles the array measures only), the residual res = y - mu, grad = Re(J^H res) and
    hess = Re(J^H J), in the leading n_act * per block."""
    n_virt = y.size
    dim = n_act * per
    for i in range(n_virt):
        res[i] = y[i]
    for a in range(n_act):
        p = act[a]
        c = a * per
        for i in range(n_virt):
            s = ph[p, i].conjugate()
            res[i] -= amp[p] * s
            col = c
            if do_u:
                jac[i, col] = -1j * kx[i] * amp[p] * s
                col += 1
            if do_w:
                jac[i, col] = -1j * kz[i] * amp[p] * s
                col += 1
            jac[i, col] = s
            jac[i, col + 1] = 1j * s
    for a in range(dim):
        acc = 0.0
        for i in range(n_virt):
            acc += (jac[i, a].conjugate() * res[i]).real
        grad[a] = acc
        for b in range(a + 1):
            acc = 0.0
            for i in range(n_virt):
                acc += (jac[i, a].conjugate() * jac[i, b]).real
            hess[a, b] = acc
            hess[b, a] = acc


@njit(cache=True)
def _trial_directions(kx, kz, act, n_act, gu, gw, step, per, do_u, do_w, max_du, max_dw, gu_try, gw_try,
                      ph_try):
    """The directions (gu_try, gw_try) and their phasors one step from (gu, gw), the step scaled
    down so that no direction moves more than one FFT bin, each pulled back onto the unit circle
    when it leaves the visible region. Returns the largest move in FFT bins."""
    big = 0.0
    for a in range(n_act):
        col = a * per
        if do_u:
            big = max(big, abs(step[col]) / max_du)
            col += 1
        if do_w:
            big = max(big, abs(step[col]) / max_dw)
    scale = 1.0 / big if big > 1.0 else 1.0
    for a in range(n_act):
        p = act[a]
        col = a * per
        u = gu[p]
        w = gw[p]
        if do_u:
            u += scale * step[col]
            col += 1
        if do_w:
            w += scale * step[col]
        r2 = u * u + w * w
        if r2 > 1.0:
            r = math.sqrt(r2)
            u /= r
            w /= r
        gu_try[p] = u
        gw_try[p] = w
        phasors(kx, kz, u, w, ph_try[p])
    return big * scale


@njit(cache=True)
def _joint_gauss_newton(
    y, kx, kz, act, n_act, gu, gw, ph, amp, gu_try, gw_try, ph_try, amp_try, res, gram, rhs,
    work, vif, jac, hess, chol, grad, step, do_u, do_w, max_du, max_dw,
):
    """Joint local refinement of all active directions: Levenberg-Marquardt iterations on
    ||y - sum_a amp_a steer(u_a, w_a)||^2 over directions and amplitudes (the direction part of
    a Gauss-Newton step of that problem is the variable-projection step; the amplitudes are
    refitted by joint least squares after every step). Steps are bounded to one FFT bin; a
    step is taken only if the misfit does not grow. At most _MAX_JOINT_ITERATIONS steps, fewer
    when one moves less than _JOINT_STEP_TOL FFT bins. On entry ph and amp hold the phasors and
    joint amplitudes at (gu, gw), on exit those of the returned point."""
    n_virt = y.size
    n_ang = (1 if do_u else 0) + (1 if do_w else 0)
    per = n_ang + 2
    dim = n_act * per
    cost = _residual_cost(y, ph, act, n_act, amp)
    lam = 1e-6
    for _ in range(_MAX_JOINT_ITERATIONS):
        _normal_equations(y, kx, kz, act, n_act, ph, amp, res, jac, hess, grad, do_u, do_w, per)
        accepted = False
        moved = 0.0
        for _try in range(8):
            if not _damped_solve(hess, grad, dim, lam, chol, step):
                lam *= 10.0
                continue
            move = _trial_directions(kx, kz, act, n_act, gu, gw, step, per, do_u, do_w, max_du, max_dw,
                                     gu_try, gw_try, ph_try)
            if joint_amplitudes(ph_try, act, n_act, y, gram, rhs, work, amp_try, vif):
                cost_try = _residual_cost(y, ph_try, act, n_act, amp_try)
                if cost_try <= cost or move <= _JOINT_STEP_TOL:
                    accepted = True
                    moved = move
                    cost = cost_try
                    break
            lam *= 10.0
        if not accepted:
            break
        lam = max(lam * 0.1, 1e-12)
        for a in range(n_act):
            p = act[a]
            gu[p] = gu_try[p]
            gw[p] = gw_try[p]
            amp[p] = amp_try[p]
            for i in range(n_virt):
                ph[p, i] = ph_try[p, i]
        if moved <= _JOINT_STEP_TOL:
            break


@njit(cache=True)
def _relax_sweeps(y, res, win, kx, kz, act, n_act, gu, gw, ph, e_try, amp, gram, rhs, work, vif, rank,
                  do_u, do_w, max_du, max_dw, crit, screen, floor):
    """RELAX sweeps over the active peaks of one snapshot (at most _MAX_RELAX_SWEEPS): get every
    peak into the basin of the joint optimum. Each peak in turn is refined as a single target on
    the data minus the others' joint fits (windowed), then all amplitudes are refitted and pruned
    (_fit_and_prune). A sweep in which no peak moves more than _RELAX_MOVE_TOL FFT bins ends them;
    so does a drop, after which the others were refined against a different model. Returns the
    active count."""
    n_virt = y.size
    n_sw = 0
    while n_act >= 2 and n_sw < _MAX_RELAX_SWEEPS:
        n_sw += 1
        move = 0.0
        n_it = _RELAX_FIRST_NEWTON_ITERATIONS if n_sw == 1 else _RELAX_NEWTON_ITERATIONS
        a = 0
        while a < n_act:
            p = act[a]
            # single-target refinement of p on the data minus the others' joint fits
            for i in range(n_virt):
                res[i] = y[i]
            for b in range(n_act):
                if b != a:
                    q = act[b]
                    for i in range(n_virt):
                        res[i] -= amp[q] * ph[q, i].conjugate()
            for i in range(n_virt):
                res[i] *= win[i]
            u, w, _ = newton_refine(res, kx, kz, gu[p], gw[p], ph[p], e_try, do_u, do_w, max_du, max_dw, n_it,
                                    _RELAX_TRUST_BINS)
            move = max(move, abs(u - gu[p]) / max_du, abs(w - gw[p]) / max_dw)
            gu[p] = u
            gw[p] = w
            # the screen waits for every peak's first refinement: a grid seed understates its peak
            n_act, dropped = _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif, rank, crit,
                                            screen if n_sw > 1 else 0.0, floor, _MAX_VARIANCE_INFLATION)
            if dropped:
                move = np.inf  # the others were refined against a different model
                break
            a += 1
        if move <= _RELAX_MOVE_TOL:
            break
    return n_act


@njit(cache=True)
def _write_back(k0, k1, act, n_act, gu, gw, gp, amp, order, win_sum2, out_u, out_w, out_p, out_keep):
    """The surviving peaks of the snapshot whose peaks are k0..k1-1 into the peak arrays, strongest
    first, the dropped ones after them with keep = False. Powers |amp|^2 * win_sum2; a lone survivor
    keeps its single-target result (out_* still hold it)."""
    if n_act == 1:
        # back to one target: its single-target refinement on the whole snapshot, as for a
        # snapshot with a single FFT peak
        p = act[0]
        gu[p] = out_u[k0 + p]
        gw[p] = out_w[k0 + p]
        gp[p] = out_p[k0 + p]
    else:
        for a in range(n_act):
            p = act[a]
            gp[p] = (amp[p].real ** 2 + amp[p].imag ** 2) * win_sum2
    for a in range(n_act):
        v = act[a]
        b = a
        while b > 0 and gp[order[b - 1]] < gp[v]:
            order[b] = order[b - 1]
            b -= 1
        order[b] = v
    for k in range(k0, k1):
        out_keep[k] = False
    for a in range(n_act):
        p = order[a]
        out_keep[k0 + a] = True
        out_u[k0 + a] = gu[p]
        out_w[k0 + a] = gw[p]
        out_p[k0 + a] = gp[p]


@njit(cache=True)
def _rounds(y, res, win, kx, kz, act, n_act, gu, gw, ph, e_try, amp, gram, rhs, work, vif, rank, gn, do_u,
            do_w, max_du, max_dw, crit, screen, floor):
    """RELAX sweeps then the joint Gauss-Newton finish, again after a drop (at most _MAX_RELAX_ROUNDS
    rounds), on the active peaks whose phasors and joint amplitudes ph, amp hold (gn: the joint
    Gauss-Newton scratch arrays, see relax_peaks). Returns the active count; on exit ph, amp hold
    the phasors and joint amplitudes of the returned set."""
    gu_try, gw_try, ph_try, amp_try, jac, hess, chol, grad, step = gn
    for _round in range(_MAX_RELAX_ROUNDS):
        n_act = _relax_sweeps(y, res, win, kx, kz, act, n_act, gu, gw, ph, e_try, amp, gram, rhs, work, vif,
                              rank, do_u, do_w, max_du, max_dw, crit, screen, floor)
        if n_act < 2:
            break
        # joint Gauss-Newton finish: the cyclic sweeps converge slowly for close peaks
        _joint_gauss_newton(y, kx, kz, act, n_act, gu, gw, ph, amp, gu_try, gw_try, ph_try, amp_try, res,
                            gram, rhs, work, vif, jac, hess, chol, grad, step, do_u, do_w, max_du, max_dw)
        n_act, dropped = _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif, rank, crit, screen, floor,
                                        _MAX_VARIANCE_INFLATION)
        if not dropped:
            break
    return n_act


@njit(cache=True)
def _test_larger_sets(y, res, win, kx, kz, act, n_act, gu, gw, ph, e_try, amp, gram, rhs, work, vif, rank, gn,
                      saved, do_u, do_w, max_du, max_dw, crit, screen, floor):
    """The split test of a set of P >= 3 peaks against the P - 1 left when the one whose removal
    costs the least misfit goes and the rest are refined again (_rounds); while it fails, the
    smaller set is tested in turn, down to two. Returns the active count of the set kept (its
    state in act, gu, gw, ph, amp; saved: scratch for the larger set)."""
    act_s, gu_s, gw_s, amp_s = saved
    while n_act >= 3:
        e_more = _residual_cost(y, ph, act, n_act, amp)
        n_more = n_act
        for a in range(n_act):
            p = act[a]
            act_s[a], gu_s[p], gw_s[p], amp_s[p] = p, gu[p], gw[p], amp[p]
        least, worst = np.inf, 0
        for a in range(n_act):
            q = amp[act[a]]
            rise = y.size * (q.real * q.real + q.imag * q.imag) / vif[act[a]]
            if rise < least:
                least, worst = rise, a
        n_act = _drop_active(act, n_act, worst)
        n_act, _ = _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif, rank, crit, screen, floor,
                                  _MAX_VARIANCE_INFLATION)
        n_act = _rounds(y, res, win, kx, kz, act, n_act, gu, gw, ph, e_try, amp, gram, rhs, work, vif, rank, gn,
                        do_u, do_w, max_du, max_dw, crit, screen, floor)
        if split_passes(_residual_cost(y, ph, act, n_act, amp), e_more, crit[n_more], floor):
            for a in range(n_more):  # the larger set stays
                p = act_s[a]
                act[a], gu[p], gw[p], amp[p] = p, gu_s[p], gw_s[p], amp_s[p]
                phasors(kx, kz, gu[p], gw[p], ph[p])
            return n_more
    return n_act


@njit(cache=True, inline="always")
def split_passes(e_fewer, e_more, crit, floor):
    """The split test (angle_split.py) with the model-error floor `floor` (the snapshot's energy times
    the model-error fraction, at least _MISFIT_FLOOR: float32 rounding): with the energy the array's
    model error may leave in e_fewer and the further source may take up removed, the further source
    explains at least the fraction crit of the misfit left without it,
    (e_fewer - floor - e_more) >= crit (e_fewer - floor); never when e_fewer <= floor."""
    return e_fewer > floor and e_fewer - floor - e_more >= crit * (e_fewer - floor)


@njit(cache=True)
def _single_misfit(y, kx, kz, u, w, e, e_try, do_u, do_w, max_du, max_dw):
    """The least-squares misfit of the best single plane wave, ||y||^2 - |a^H y|^2 / n_virt at the
    unweighted beam maximum, refined from (u, w) (the step-5 result, which a window biases)."""
    phasors(kx, kz, u, w, e)
    _, _, p = newton_refine(y, kx, kz, u, w, e, e_try, do_u, do_w, max_du, max_dw, MAX_NEWTON_ITERATIONS, 0.0)
    energy = 0.0
    for i in range(y.size):
        energy += y[i].real * y[i].real + y[i].imag * y[i].imag
    return max(energy - p / y.size, 0.0)


@njit(cache=True)
def relax_peaks(snapshots, cal, win, kx, kz, n_found, det, do_u, do_w, max_du, max_dw, crit, screen, win_sum2,
                floor_fraction, out_keep, out_u, out_w, out_p):
    """Joint refinement of every snapshot with two or more kept peaks (module doc: RELAX sweeps,
    then joint Gauss-Newton, at most _MAX_RELAX_ROUNDS rounds), then the split test of every further
    peak (angle_split.py: crit[P] the critical value of the P-th source; screen the fraction of it
    below which a peak is dropped during the sweeps; floor_fraction the model-error floor of the test
    as a fraction of the snapshot's energy, angle_split.py), in place on the output of
    angle_refine.refine_peaks. cal: calibration per channel, win: window weight per channel,
    win_sum2: (sum of window weights)^2. Within a snapshot the kept peaks are written back first,
    strongest first; the others get keep = False.

    The test, from the most peaks down: P >= 3 peaks are compared with the P - 1 left when the one
    costing the least misfit goes and the rest are refined again; two with the best single plane
    wave (_single_misfit). When a test fails the smaller set is kept and tested in turn; a snapshot
    back to one peak reports its strongest step-5 peak."""
    n_virt = snapshots.shape[1]
    mp = largest_group(det, n_found)
    y = np.empty(n_virt, np.complex128)
    res = np.empty(n_virt, np.complex128)
    ph = np.empty((mp, n_virt), np.complex128)  # phasors (conjugate steering) per peak
    e_try = np.empty(n_virt, np.complex128)
    e_one = np.empty(n_virt, np.complex128)  # phasors of the best single plane wave
    amp = np.zeros(mp, np.complex128)
    gram = np.empty((mp, mp), np.complex128)
    rhs = np.empty(mp, np.complex128)
    work = np.empty(mp, np.complex128)
    vif = np.empty(mp, np.float64)
    act = np.empty(mp, np.int64)
    gu = np.empty(mp, np.float64)
    gw = np.empty(mp, np.float64)
    gp = np.empty(mp, np.float64)
    rank = np.empty(mp, np.float64)
    order = np.empty(mp, np.int64)
    # the larger set while a smaller one is tried (P >= 3)
    saved = (np.empty(mp, np.int64), np.empty(mp, np.float64), np.empty(mp, np.float64), np.empty(mp, np.complex128))
    # joint Gauss-Newton buffers
    n_ang = (1 if do_u else 0) + (1 if do_w else 0)
    dim_max = mp * (n_ang + 2)
    gu_try = np.empty(mp, np.float64)
    gw_try = np.empty(mp, np.float64)
    ph_try = np.empty((mp, n_virt), np.complex128)
    amp_try = np.empty(mp, np.complex128)
    jac = np.empty((n_virt, dim_max), np.complex128)
    hess = np.empty((dim_max, dim_max), np.float64)
    chol = np.empty((dim_max, dim_max), np.float64)
    grad = np.empty(dim_max, np.float64)
    step = np.empty(dim_max, np.float64)
    gn = (gu_try, gw_try, ph_try, amp_try, jac, hess, chol, grad, step)
    k0 = 0
    while k0 < n_found:
        k1 = group_end(det, n_found, k0)
        n_act = 0
        best = -1
        for k in range(k0, k1):
            if out_keep[k]:
                act[n_act] = k - k0
                n_act += 1
                if best < 0 or out_p[k] > out_p[k0 + best]:
                    best = k - k0
        if n_act < 2:
            k0 = k1
            continue
        d = det[k0]
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * cal[i]
        for a in range(n_act):
            p = act[a]
            gu[p] = out_u[k0 + p]
            gw[p] = out_w[k0 + p]
            amp[p] = 0.0
            rank[p] = out_p[k0 + p]
            phasors(kx, kz, gu[p], gw[p], ph[p])
        floor = 0.0
        for i in range(n_virt):
            floor += y[i].real * y[i].real + y[i].imag * y[i].imag
        floor *= max(floor_fraction, _MISFIT_FLOOR)
        n_act, _ = _fit_and_prune(ph, act, n_act, y, gram, rhs, work, amp, vif, rank, crit, 0.0, floor,
                                  _MAX_VARIANCE_INFLATION)
        n_act = _rounds(y, res, win, kx, kz, act, n_act, gu, gw, ph, e_try, amp, gram, rhs, work, vif, rank, gn,
                        do_u, do_w, max_du, max_dw, crit, screen, floor)
        if n_act >= 3:
            n_act = _test_larger_sets(y, res, win, kx, kz, act, n_act, gu, gw, ph, e_try, amp, gram, rhs, work,
                                      vif, rank, gn, saved, do_u, do_w, max_du, max_dw, crit, screen, floor)
        if n_act == 2:
            e_single = _single_misfit(y, kx, kz, out_u[k0 + best], out_w[k0 + best], e_one, e_try, do_u, do_w,
                                      max_du, max_dw)
            if not split_passes(e_single, _residual_cost(y, ph, act, n_act, amp), crit[2], floor):
                n_act = 1
                act[0] = best
        _write_back(k0, k1, act, n_act, gu, gw, gp, amp, order, win_sum2, out_u, out_w, out_p, out_keep)
        k0 = k1
