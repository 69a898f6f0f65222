"""Batched FFTs for the hot path, in place or into a given (possibly transposed) output.

scipy.fft (pocketfft with batched SIMD transforms) runs several times faster than numpy.fft on the
cubes the chain transforms. scipy.fft's public functions take no output array, so the hot path calls
pocketfft's own entry point under scipy.fft, which does: the range FFT then writes its result straight
into the transposed layout the Doppler FFT wants, and no frame-sized array is allocated per frame.
That entry point is private to scipy; it is checked against scipy.fft.fft once at import, and if it
is missing or disagrees the public function is used instead (same numbers, plus one copy per call).
One thread: a worker process owns one core.
"""

from __future__ import annotations

import numpy as np
import scipy.fft

try:  # pocketfft's binding as scipy ships it: c2c(a, axes, forward, inorm, out, nthreads)
    from scipy.fft._pocketfft.pypocketfft import c2c as _pocketfft_c2c
except ImportError:  # pragma: no cover - depends on the installed scipy
    _pocketfft_c2c = None


def _direct_works() -> bool:
    if _pocketfft_c2c is None:
        return False
    try:
        rng = np.random.default_rng(0)
        a = (rng.standard_normal((3, 8, 16)) + 1j * rng.standard_normal((3, 8, 16))).astype(np.complex64)
        out = np.zeros((3, 16, 8), np.complex64)
        _pocketfft_c2c(a, (2,), True, 0, out.transpose(0, 2, 1), 1)
        ref = scipy.fft.fft(a, axis=2)
        return bool(np.allclose(out.transpose(0, 2, 1), ref, rtol=1e-5, atol=1e-4))
    except Exception:  # pragma: no cover - an incompatible scipy: fall back to the public function
        return False


DIRECT = _direct_works()


def fft_into(a: np.ndarray, out: np.ndarray, axis: int = -1) -> np.ndarray:
    """out = FFT of complex64 `a` along `axis`. `out` has a's shape and any strides (a transposed
    view, or `a` itself for in place); it must not otherwise overlap `a`. Returns `out`."""
    if DIRECT:
        _pocketfft_c2c(a, (axis % a.ndim,), True, 0, out, 1)
    elif out is a:
        res = scipy.fft.fft(a, axis=axis, overwrite_x=True, workers=1)
        if not np.shares_memory(res, a):
            out[...] = res
    else:
        out[...] = scipy.fft.fft(a, axis=axis, workers=1)
    return out


def fft_inplace(a: np.ndarray, axis: int = -1) -> np.ndarray:
    """Transform a complex64 array along `axis` in place; returns `a`."""
    return fft_into(a, a, axis)


def ifft_unnormalised_inplace(a: np.ndarray, axis: int = -1) -> np.ndarray:
    """In place inverse transform without the 1/N (kernel exp(+j 2 pi k n / N)): what numpy and
    scipy call norm="forward". Returns `a`."""
    if DIRECT:
        _pocketfft_c2c(a, (axis % a.ndim,), False, 0, a, 1)
    else:
        res = scipy.fft.ifft(a, axis=axis, norm="forward", overwrite_x=True, workers=1)
        if not np.shares_memory(res, a):
            a[...] = res
    return a
