r"""The telescoped risk integral as compiled loops over rows (numba), imported on first use.

The terms are those of :mod:`quakefolio.core.risk_pieces` (its module notes give the
method, Cornell et al. 2002, Eq. 11 per piece), computed by the same expressions, one row
at a time, in two passes over a chunk of rows:

1. :func:`pieces_into`: per damage state, the lower-tail piece, the kept segment pieces
   (p = first .. m-1) and the upper-tail piece, each as an exponent
   :math:`\ln C_p = \ln\lambda_a + k_p\beta\,(z_a + k_p\beta/2)` and a factor
   :math:`\sigma[\Phi(\sigma(v_p + k_p\beta)) - \Phi(\sigma(u_p + k_p\beta))]` with
   :math:`\sigma = -\operatorname{sign}(u_p + k_p\beta)` taken from the sign bit; where
   :math:`\ln C_p >` :data:`~quakefolio.core.risk_pieces.LOG_COEF_MAX` the exponent takes the
   log of the difference as well (log-space :math:`\Phi`, the scalar form of
   :func:`~quakefolio.core.risk_pieces.log_ndtr_diff`) and the factor is 1;
2. numpy's exponential over the chunk (vectorised), then :func:`sums_into`: the terms,
   each state's segment pieces added in order.

One loop does per piece what a chain of array passes does otherwise, so the kernel costs
little more than its normal-CDF evaluations.

The normal CDF is scipy's own (``scipy.special.cython_special``, the functions behind
``scipy.special.ndtr``, ``erfc`` and ``log_ndtr``), called through C function pointers that
are passed as arguments, so that the compiled code can be cached on disk (numba caches no
function holding a pointer as a global).  For arguments at most 0 :func:`cdf` calls the
complementary error function directly, the expression scipy's ``ndtr`` evaluates there
(Cephes, Moshier 1989): the values are scipy's, bit for bit (``tests/test_kernels.py``).

A row depends on nothing but its own inputs, so results do not depend on how rows are split
between chunks, calls or threads (the loops release the GIL).

Compilation: the first call in a fresh installation compiles the loops (about a second) and
writes the machine code beside this file (``__pycache__``, or numba's user cache directory
where that is read-only); later processes load it (about 0.2 s with the import of numba).
Nothing here runs at the import of :mod:`quakefolio.core.risk`.

Reference: Moshier, S.L. (1989). Methods and Programs for Mathematical Functions. Prentice
Hall (the Cephes ``ndtr`` and ``erfc`` that scipy ships).
"""
from __future__ import annotations

import ctypes
import math

import numba
import numpy as np
from numba.extending import get_cython_function_address

__all__ = ["pieces_into", "sums_into", "cdf", "PHI", "ERFC", "LOG_PHI"]

_SCALAR = ctypes.CFUNCTYPE(ctypes.c_double, ctypes.c_double, ctypes.c_int)
#: scipy's normal CDF, ``double ndtr(double, int skip_dispatch)`` (the real-argument variant).
PHI = _SCALAR(get_cython_function_address("scipy.special.cython_special", "__pyx_fuse_1ndtr"))
#: scipy's complementary error function, same signature.
ERFC = _SCALAR(get_cython_function_address("scipy.special.cython_special", "__pyx_fuse_1erfc"))
#: :math:`1/\sqrt2` as Cephes ``ndtr`` has it (``M_SQRT1_2``).
SQRT1_2 = 0.70710678118654752440
#: scipy's log normal CDF, same signature.
LOG_PHI = _SCALAR(get_cython_function_address("scipy.special.cython_special", "__pyx_fuse_1log_ndtr"))


@numba.njit(cache=True, nogil=True, fastmath=False)
def _log_difference(log_phi, lo, hi):
    """ln(Phi(hi) - Phi(lo)) for hi > lo, both tails accurate (scalar form of ``log_ndtr_diff``)."""
    if hi <= lo:
        return -math.inf
    if lo > 0.0:
        a, c = -lo, -hi
    else:
        a, c = hi, lo
    la = log_phi(a, 0)
    return la + math.log1p(-math.exp(log_phi(c, 0) - la))


@numba.njit(cache=True, nogil=True, fastmath=False)
def _cdf_nonpositive(erfc, x):
    r""":math:`\Phi(x)` for :math:`x \le 0` as :math:`\tfrac12\operatorname{erfc}(-x/\sqrt2)`, scipy's ``ndtr`` there bit for bit.

    Cephes ``ndtr`` evaluates that expression for :math:`x \le 0` (half the complementary
    error function of :math:`|x|/\sqrt2`, or :math:`\tfrac12 + \tfrac12\operatorname{erf}` near 0:
    the same bits, as halving is exact); calling ``erfc`` directly skips a layer of calls
    (``tests/test_kernels.py`` checks the identity).
    """
    return 0.5 * erfc(-x * SQRT1_2, 0)


@numba.njit(cache=True, nogil=True, fastmath=False)
def cdf(phi, erfc, x):
    r""":math:`\Phi(x)`, scipy's ``ndtr`` bit for bit (:func:`_cdf_nonpositive` for :math:`x \le 0`)."""
    if x <= 0.0:
        return _cdf_nonpositive(erfc, x)
    return phi(x, 0)


@numba.njit(cache=True, nogil=True, fastmath=False)
def _difference(phi, erfc, lo, hi):
    r""":math:`\sigma[\Phi(\sigma hi) - \Phi(\sigma lo)] \ge 0`, :math:`\sigma = -\operatorname{sign}(lo)` (sign bit).

    Every argument but ``hi`` where :math:`lo < 0` is at most 0.
    """
    if math.copysign(1.0, lo) < 0.0:
        return abs(cdf(phi, erfc, hi) - _cdf_nonpositive(erfc, lo))
    return abs(_cdf_nonpositive(erfc, -hi) - _cdf_nonpositive(erfc, -lo))


@numba.njit(cache=True, nogil=True, fastmath=False)
def _piece(phi, erfc, log_phi, la, za, kb, lo, hi, log_coef_max):
    """One piece as (exponent, factor): the term is exp(exponent) * factor [1/yr].

    ln C = la + kb (za + kb/2); the factor is Phi(hi) - Phi(lo) (:func:`_difference`), or, where
    ln C exceeds ``log_coef_max``, the exponent is ln C + ln(Phi(hi) - Phi(lo)) and the factor 1.
    """
    c = (kb * 0.5 + za) * kb + la
    if c > log_coef_max:
        return c + _log_difference(log_phi, lo, hi), 1.0
    return c, _difference(phi, erfc, lo, hi)


@numba.njit(cache=True, nogil=True, fastmath=False)
def pieces_into(phi, erfc, log_phi, lnx, ln_lam, ln_theta, beta, z_shared, first, offsets, truncate, ends,
                log_coef_max, r0, r1, c, d, out):
    r"""Exponents and factors of the pieces of rows ``r0:r1`` into ``c, d`` (pass 1 of 2).

    Row ``r`` takes ``c[r - r0, offsets[s]:offsets[s + 1]]`` for state ``s``: the lower-tail
    piece, the segment pieces ``first[s] .. m-1``, the upper-tail piece (exponent -inf and
    factor 0 if ``truncate``), each as (exponent, factor) (:func:`_piece`).  If ``ends``,
    :math:`\Phi(z_0)` and :math:`\Phi(z_{m-1})` go to ``out[3:5, r]``.

    Parameters
    ----------
    phi, erfc, log_phi : C function pointers
        :data:`PHI`, :data:`ERFC`, :data:`LOG_PHI`.
    lnx : ndarray (1 or n, m)
        Log levels [ln IM units]; one row shared by all rows, or one per row.
    ln_lam : ndarray (1 or n, m)
        Log rates [ln 1/yr], finite.
    ln_theta, beta : ndarray (1 or n, n_ds)
        Log medians [ln IM units] and dispersions [-].
    z_shared : ndarray (1 or 0, n_ds, m)
        :math:`z = (\ln x - \ln\theta)/\beta` of every row where the rows share their levels
        and fragility (computed by the same expression), else empty.
    first : ndarray (n_ds,) of int64
        First segment piece evaluated per state (1 where none is left out).
    offsets : ndarray (n_ds + 1,) of int64
        Each state's first slot in a row of ``c, d``.
    """
    m = ln_lam.shape[1]
    n_ds = first.shape[0]
    k = np.empty(m - 1)
    z_row = np.empty((n_ds, m))
    shared = z_shared.shape[0] == 1
    for r in range(r0, r1):
        rx = r if lnx.shape[0] > 1 else 0
        rl = r if ln_lam.shape[0] > 1 else 0
        rf = r if ln_theta.shape[0] > 1 else 0
        cr, dr = c[r - r0], d[r - r0]
        for i in range(m - 1):  # k of segment i: -d ln(lambda) / d ln(x)
            k[i] = (ln_lam[rl, i] - ln_lam[rl, i + 1]) / (lnx[rx, i + 1] - lnx[rx, i])
        if not shared:
            for s in range(n_ds):
                for i in range(m):
                    z_row[s, i] = (lnx[rx, i] - ln_theta[rf, s]) / beta[rf, s]
        for s in range(n_ds):
            b = beta[rf, s]
            z = z_shared[0, s] if shared else z_row[s]
            j = offsets[s]
            # lower tail (-inf, z_0]: the first segment's slope, or k = 0 (lambda_0 Phi(z_0)) if truncated
            kb = 0.0 if truncate else k[0] * b
            cr[j], dr[j] = _piece(phi, erfc, log_phi, ln_lam[rl, 0], z[0], kb, -math.inf, z[0] + kb,
                                  log_coef_max)
            for p in range(first[s], m):  # segment [z_{p-1}, z_p], anchored at its lower end
                j += 1
                kb = k[p - 1] * b
                cr[j], dr[j] = _piece(phi, erfc, log_phi, ln_lam[rl, p - 1], z[p - 1], kb, z[p - 1] + kb,
                                      z[p] + kb, log_coef_max)
            j += 1
            if truncate:  # no upper piece
                cr[j], dr[j] = -math.inf, 0.0
            else:  # upper tail [z_{m-1}, inf): the last segment's slope
                kb = k[m - 2] * b
                cr[j], dr[j] = _piece(phi, erfc, log_phi, ln_lam[rl, m - 1], z[m - 1], kb, z[m - 1] + kb,
                                      math.inf, log_coef_max)
            if ends:
                out[3, r, s] = cdf(phi, erfc, z[0])
                out[4, r, s] = cdf(phi, erfc, z[m - 1])


@numba.njit(cache=True, nogil=True, fastmath=False)
def sums_into(offsets, e, d, r0, r1, out):
    """Terms exp(c) * d of rows ``r0:r1`` (``e`` holding exp(c)) into ``out[0:3, r]`` (pass 2 of 2).

    inner: the segment pieces added in order; low and high: the tail pieces.
    """
    n_ds = offsets.shape[0] - 1
    for r in range(r0, r1):
        er, dr = e[r - r0], d[r - r0]
        for s in range(n_ds):
            j0, j1 = offsets[s], offsets[s + 1] - 1  # the lower-tail and the upper-tail slot
            inner = 0.0
            for j in range(j0 + 1, j1):
                term = er[j] * dr[j]
                inner = term if j == j0 + 1 else inner + term
            out[0, r, s] = inner
            out[1, r, s] = er[j0] * dr[j0]
            out[2, r, s] = er[j1] * dr[j1]
