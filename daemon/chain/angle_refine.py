"""Single-target refinement on the true element positions (step 5 of the angle module doc).

Newton iterations with analytic first and second derivatives on
P(u, w) = |sum_i c_i conj(steer_i(u, w)) s_i|^2 over the ACTUAL element positions
(c_i = calibration times window weight; with the default "rect" window this is the
single-target maximum-likelihood estimate), seeded by the FFT peak, each step bounded to one
FFT bin. Refined peaks that land within half a bin of a stronger refined peak of the same
snapshot are dropped. A refined point outside the visible region is pulled back onto the
unit circle u^2 + w^2 = 1. With steer_i(u, w) = exp(-j (kx_i u + kz_i w)), kx_i, kz_i the
centred positions times 2 pi / lambda, the conjugate steering vector is `phasors`.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["MAX_NEWTON_ITERATIONS", "phasors", "newton_refine", "refine_peaks"]

MAX_NEWTON_ITERATIONS = 12


@njit(cache=True, inline="always")
def _power_derivatives(b, su, sw, suu, suw, sww):
    """|B|^2 and its gradient and Hessian in (u, w) from the beam B and its weighted sums
    (dB/du = j su, d2B/du2 = -suu, d2B/dudw = -suw, ...)."""
    cb = b.conjugate()
    p = b.real * b.real + b.imag * b.imag
    gu = -2.0 * (cb * su).imag
    gw = -2.0 * (cb * sw).imag
    huu = -2.0 * (cb * suu).real + 2.0 * (su.real * su.real + su.imag * su.imag)
    hww = -2.0 * (cb * sww).real + 2.0 * (sw.real * sw.real + sw.imag * sw.imag)
    huw = -2.0 * (cb * suw).real + 2.0 * (su.conjugate() * sw).real
    return p, gu, gw, huu, huw, hww


@njit(cache=True)
def phasors(kx, kz, u, w, e):
    """e_i = exp(j (kx_i u + kz_i w)): the conjugate steering vector at (u, w)."""
    for i in range(kx.size):
        ph = kx[i] * u + kz[i] * w
        e[i] = complex(math.cos(ph), math.sin(ph))


@njit(cache=True)
def _beam_from_phasors(y, kx, kz, e):
    """P = |B|^2 with B = sum y_i e_i, e = phasors(kx, kz, u, w), its gradient and Hessian in (u, w)."""
    b = 0j
    su = 0j
    sw = 0j
    suu = 0j
    suw = 0j
    sww = 0j
    for i in range(y.size):
        t = y[i] * e[i]
        b += t
        su += kx[i] * t
        sw += kz[i] * t
        suu += kx[i] * kx[i] * t
        suw += kx[i] * kz[i] * t
        sww += kz[i] * kz[i] * t
    return _power_derivatives(b, su, sw, suu, suw, sww)


@njit(cache=True)
def _axis_step(g, h, max_step):
    if h < 0.0:
        return -g / h
    if g > 0.0:
        return 0.25 * max_step
    if g < 0.0:
        return -0.25 * max_step
    return 0.0


@njit(cache=True)
def newton_refine(y, kx, kz, u, w, e, e_try, do_u, do_w, max_du, max_dw, max_iter, trust_bins):
    """Maximise P(u, w) = |sum_i y_i exp(j (kx_i u + kz_i w))|^2 from (u, w): at most max_iter
    Newton steps with analytic derivatives, each bounded to (max_du, max_dw) (one FFT bin),
    backtracking until the power does not drop. Steps below trust_bins FFT bins in both
    coordinates are taken without the power check (where P differs from its rounding only);
    trust_bins = 0 checks every step. A result outside the visible region is pulled back onto
    the unit circle. e must hold phasors(kx, kz, u, w) on entry and holds those of the returned
    point on exit (so a caller that refines the same point again pays no trigonometry for it);
    e_try is scratch. Returns (u, w, P)."""
    tol_u = max_du * 1e-9
    tol_w = max_dw * 1e-9
    p, gu, gw, huu, huw, hww = _beam_from_phasors(y, kx, kz, e)
    for _ in range(max_iter):
        su = 0.0
        sw = 0.0
        if do_u and do_w:
            det_h = huu * hww - huw * huw
            if huu < 0.0 and det_h > 0.0:
                su = -(hww * gu - huw * gw) / det_h
                sw = -(huu * gw - huw * gu) / det_h
            else:
                su = _axis_step(gu, huu, max_du)
                sw = _axis_step(gw, hww, max_dw)
        elif do_u:
            su = _axis_step(gu, huu, max_du)
        elif do_w:
            sw = _axis_step(gw, hww, max_dw)
        scale = 1.0
        if abs(su) > max_du:
            scale = max_du / abs(su)
        if abs(sw) * scale > max_dw:
            scale = max_dw / abs(sw)
        su *= scale
        sw *= scale
        if su == 0.0 and sw == 0.0:
            break
        accepted = False
        for _bt in range(8):
            phasors(kx, kz, u + su, w + sw, e_try)
            p2, gu2, gw2, huu2, huw2, hww2 = _beam_from_phasors(y, kx, kz, e_try)
            if p2 >= p or (abs(su) <= trust_bins * max_du and abs(sw) <= trust_bins * max_dw):
                accepted = True
                break
            su *= 0.5
            sw *= 0.5
        if not accepted:
            break
        u += su
        w += sw
        e[:] = e_try
        p, gu, gw, huu, huw, hww = p2, gu2, gw2, huu2, huw2, hww2
        if abs(su) <= tol_u and abs(sw) <= tol_w:
            break
    r2 = u * u + w * w
    if r2 > 1.0:
        r = math.sqrt(r2)
        u /= r
        w /= r
        phasors(kx, kz, u, w, e)
        p = _beam_from_phasors(y, kx, kz, e)[0]
    return u, w, p


@njit(cache=True)
def refine_peaks(
    snapshots, chan_weight, kx, kz, n_found, det, u_grid, w_grid, pk_ix, pk_iz, do_u, do_w, do_refine,
    max_du, max_dw, out_keep, out_u, out_w, out_p,
):
    """Independent single-target refinement of every FFT peak (step 5, module doc), seeded at its
    grid point (u_grid[pk_ix], w_grid[pk_iz]); do_refine false keeps the grid point and its beam
    power."""
    n_virt = snapshots.shape[1]
    y = np.empty(n_virt, np.complex128)
    e = np.empty(n_virt, np.complex128)
    e_try = np.empty(n_virt, np.complex128)
    first_of_det = 0
    for k in range(n_found):
        d = det[k]
        if k == 0 or det[k - 1] != d:
            first_of_det = k
        for i in range(n_virt):
            y[i] = complex(snapshots[d, i]) * chan_weight[i]
        u = u_grid[pk_ix[k]]
        w = w_grid[pk_iz[k]]
        if do_refine:
            phasors(kx, kz, u, w, e)
            u, w, p = newton_refine(y, kx, kz, u, w, e, e_try, do_u, do_w, max_du, max_dw,
                                     MAX_NEWTON_ITERATIONS, 0.0)
        else:
            phasors(kx, kz, u, w, e)
            p = _beam_from_phasors(y, kx, kz, e)[0]
        keep = True
        for j in range(first_of_det, k):
            if out_keep[j] and abs(out_u[j] - u) < 0.5 * max_du and abs(out_w[j] - w) < 0.5 * max_dw:
                keep = False
                break
        out_keep[k] = keep
        out_u[k] = u
        out_w[k] = w
        out_p[k] = p
