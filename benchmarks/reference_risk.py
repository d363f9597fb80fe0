r"""Tight reference of the damage-convolution benchmark: the same exact risk integral in plain numpy.

Run by ``bench_risk.py`` beside :func:`quakefolio.core.risk.damage_state_rates` (and checked
against it to 1e-12 relative by ``tests/test_kernels.py``).

Method.  The hazard curve is a power law :math:`\lambda_a (x/x_a)^{-k_p}` on each piece
:math:`p` of the IM axis: the lower tail :math:`(0, x_0]`, the tabulated segments
:math:`[x_i, x_{i+1}]` and the upper tail :math:`[x_{n}, \infty)` (end segments'
slopes continued).  Integrating :math:`\int \Phi(z)\,|d\lambda|` by parts on each piece
(Cornell et al. 2002, Eq. 11, per piece; the module notes of :mod:`quakefolio.core.risk`)
gives boundary terms :math:`\lambda\Phi(z)` that cancel between neighbouring pieces
and with the tails' own, so the damage-state rate is a sum of positive terms only:

.. math:: \lambda_{ds} = \sum_p C_p \left[\Phi(v_p + k_p\beta) - \Phi(u_p + k_p\beta)\right],
          \qquad C_p = \lambda_a\,e^{-k_p(\ln\theta - \ln x_a) + k_p^2\beta^2/2},

with :math:`u_p, v_p` the piece's bounds in :math:`z = (\ln x - \ln\theta)/\beta`
(:math:`\mp\infty` for the tails).  Differences of :math:`\Phi` are taken on the side of
the smaller values (survival functions when both arguments are positive), so they keep
their relative accuracy.  Two :math:`\Phi` evaluations per piece, one exponential and one
logarithm; no per-level :math:`\Phi`, no branches.

Scope: strictly positive rates (no segment ending at a zero rate), extrapolated tails, no
diagnostics: the benchmark's inputs.  The production kernel
(:mod:`quakefolio.core.risk_pieces`) sums the same positive terms, but multiplies
:math:`C_p` and the plain :math:`\Phi` difference (log space only where :math:`\ln C_p` is
large), adds the pieces in another order and handles both tail policies, the tail
diagnostics and threads; curves reaching a zero rate go to the per-segment kernel of
:mod:`quakefolio.core.risk`.  So the two agree to round-off, not bit for bit.

Reference: Cornell, C.A., Jalayer, F., Hamburger, R.O., Foutch, D.A. (2002). Probabilistic
basis for 2000 SAC FEMA steel moment frame guidelines. J. Struct. Eng. 128(4), 526-533.
"""
from __future__ import annotations

import numpy as np
from scipy.special import ndtr


#: Curves x states x pieces per block (work arrays in L2 cache).
BLOCK_VALUES = 1 << 15


def damage_state_rates_reference(im_levels, rates, medians, betas):
    """Annual rates [1/yr] of reaching each damage state, extrapolated tails (module notes).

    Parameters
    ----------
    im_levels : ndarray, shape (n_levels,) or (n_curves, n_levels) [IM units]
    rates : ndarray, shape (n_curves, n_levels) [1/yr], strictly positive, non-increasing
    medians, betas : ndarray, shape (n_ds,) [IM units], [-]

    Returns
    -------
    ndarray, shape (n_curves, n_ds) [1/yr]
    """
    lam = np.asarray(rates, dtype=float)
    lnx = np.broadcast_to(np.log(np.asarray(im_levels, dtype=float)), lam.shape)
    if not np.all(lam > 0):
        raise ValueError("the reference takes strictly positive rates only")
    ln_lam = np.log(lam)
    k = (ln_lam[:, :-1] - ln_lam[:, 1:]) / np.diff(lnx, axis=1)
    # pieces: lower tail, segments, upper tail; anchor level, its log rate and the slope
    k_p = np.concatenate([k[:, :1], k, k[:, -1:]], axis=1)
    x_a = np.concatenate([lnx[:, :1], lnx], axis=1)
    l_a = np.concatenate([ln_lam[:, :1], ln_lam], axis=1)
    ln_theta = np.log(np.asarray(medians, dtype=float))[:, None]
    beta = np.asarray(betas, dtype=float)[:, None]
    n, m = lam.shape
    out = np.empty((n, len(beta)))
    step = max(1, BLOCK_VALUES // (len(beta) * (m + 1)))
    for r in range(0, n, step):
        sl = slice(r, r + step)
        out[sl] = _block(lnx[sl], k_p[sl], x_a[sl], l_a[sl], ln_theta, beta)
    return out


def _block(lnx, k_p, x_a, l_a, ln_theta, beta):
    """Sum over pieces of C_p [Phi(hi) - Phi(lo)] for one block of curves, shape (n, n_ds)."""
    n, m = lnx.shape
    kb = k_p[:, None, :] * beta  # (n, n_ds, m + 1)
    lo = np.empty(kb.shape)
    hi = np.empty(kb.shape)
    np.subtract(lnx[:, None, :], ln_theta, out=lo[..., 1:])
    lo[..., 1:] /= beta
    lo[..., 0] = -np.inf
    hi[..., :-1] = lo[..., 1:]
    hi[..., -1] = np.inf
    lo += kb
    hi += kb
    upper = lo > 0  # both arguments positive: survival functions
    a = np.where(upper, -lo, hi)
    np.negative(hi, out=hi, where=upper)
    np.copyto(hi, lo, where=~upper)
    ndtr(a, out=a)
    a -= ndtr(hi, out=hi)
    with np.errstate(divide="ignore"):  # a difference below the smallest double adds 0
        np.log(a, out=a)
    # log C_p = ln lambda_a - k (ln theta - ln x_a) + (k beta)^2 / 2
    np.subtract(ln_theta, x_a[:, None, :], out=lo)
    lo *= k_p[:, None, :]
    np.subtract(l_a[:, None, :], lo, out=lo)
    kb *= kb
    kb *= 0.5
    lo += kb
    lo += a
    return np.exp(lo, out=lo).sum(axis=-1)
