r"""Convolution of hazard curves with lognormal fragility functions.

The annual rate of reaching or exceeding damage state :math:`ds` is

.. math:: \lambda_{ds} = \int_0^\infty P(DS \ge ds \mid x)\,|d\lambda(x)|,
          \qquad P(DS \ge ds \mid x) = \Phi\!\left(\frac{\ln x - \ln\theta}{\beta}\right)

(the risk integral; Cornell et al. 2002).  The hazard curve is tabulated and is a
local power law between points (see :mod:`quakefolio.core.curves`), so the integral is
evaluated *exactly* segment by segment.  On :math:`[x_i, x_{i+1}]` with
:math:`\lambda = \lambda_i (x/x_i)^{-k}` and :math:`z = (\ln x - \ln\theta)/\beta`,

.. math:: \int_{x_i}^{x_{i+1}} \Phi(z)\,|d\lambda|
          = \lambda_i\Phi(z_i) - \lambda_{i+1}\Phi(z_{i+1})
          + \lambda_{seg}(\theta)\, e^{k^2\beta^2/2}
            \left[\Phi(z_{i+1}+k\beta) - \Phi(z_i+k\beta)\right]

with :math:`\lambda_{seg}(\theta) = \lambda_i (\theta/x_i)^{-k}` (integration by parts;
for a pure power law this is the closed form of Cornell et al. 2002, Eq. 11).  The third
term is evaluated in log space so that neither :math:`e^{k^2\beta^2/2}` nor
:math:`\lambda_{seg}(\theta)` over- or underflows.  A segment ending at a zero rate is
linear in :math:`\ln x` (package convention), with the exact integral
:math:`\lambda_i \beta/\Delta\,[G(z_{i+1}) - G(z_i)]`, :math:`G(z) = z\Phi(z) + \varphi(z)`.

Tails: below the first tabulated level and above the last one the integrand is
unknown.  ``tail="extrapolate"`` continues the end segments' power laws to 0 and to
infinity (closed form); ``tail="truncate"`` takes no contribution below the range and
counts every exceedance of the top level at the top level (a lower bound).  The
extrapolated tail contributions are always available as diagnostics (share of
:math:`\lambda_{ds}`).

References
----------
Cornell, C.A., Jalayer, F., Hamburger, R.O., Foutch, D.A. (2002). Probabilistic basis
for 2000 SAC FEMA steel moment frame guidelines. J. Struct. Eng. 128(4), 526-533.

Luco, N., Ellingwood, B.R., Hamburger, R.O., Hooper, J.D., Kimball, J.K., Kircher, C.A.
(2007). Risk-targeted versus current seismic design maps for the conterminous United
States. SEAOC 2007 Convention Proceedings.

ASCE/SEI 7-16 (2017), Chapter 21, Section 21.2.1.2 (risk-targeted ground motion).
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.lazy import lazy_module
from quakefolio.core.curves import rate_from_prob, validate_curve
from quakefolio.core.risk_pieces import log_ndtr_diff, piece_sums

special = lazy_module("scipy.special")

__all__ = [
    "lognormal_fragility",
    "lognormal_crossing_im",
    "damage_state_rates",
    "risk_disaggregation",
    "risk_targeted_im",
]

TAIL_POLICIES = ("extrapolate", "truncate")


def lognormal_fragility(im, median, beta):
    r"""Probability of reaching or exceeding a damage state at ``im`` [-].

    :math:`P = \Phi(\ln(x/\theta)/\beta)`, equal to
    ``scipy.stats.lognorm.cdf(x, s=beta, scale=median)``.

    Parameters
    ----------
    im : array_like [IM units], non-negative
    median : array_like [IM units], positive
    beta : array_like [-], positive (lognormal standard deviation)
    """
    x = np.asarray(im, dtype=float)
    theta, b = _check_fragility(median, beta)
    with np.errstate(divide="ignore"):
        return special.ndtr(np.log(x / theta) / b)


def lognormal_crossing_im(median_1, beta_1, median_2, beta_2):
    r"""Intensity [IM units] where two lognormal fragility curves cross, NaN if parallel.

    Two curves are equal where their standardised variables agree,
    :math:`(\ln x - \ln\theta_1)/\beta_1 = (\ln x - \ln\theta_2)/\beta_2`, i.e.
    :math:`\ln x^* = (\beta_2\ln\theta_1 - \beta_1\ln\theta_2)/(\beta_2 - \beta_1)`.
    """
    l1 = np.log(np.asarray(median_1, dtype=float))
    l2 = np.log(np.asarray(median_2, dtype=float))
    b1 = np.asarray(beta_1, dtype=float)
    b2 = np.asarray(beta_2, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        lnx = (b2 * l1 - b1 * l2) / (b2 - b1)
    return np.where(b1 == b2, np.nan, np.exp(lnx))


def _check_fragility(medians, betas):
    theta = np.asarray(medians, dtype=float)
    b = np.asarray(betas, dtype=float)
    if np.any(~np.isfinite(theta)) or np.any(theta <= 0):
        raise ValueError(f"medians must be positive and finite, got {theta[~(theta > 0) | ~np.isfinite(theta)][:3]!r}")
    if np.any(~np.isfinite(b)) or np.any(b <= 0):
        raise ValueError(f"betas must be positive and finite, got {b[~(b > 0) | ~np.isfinite(b)][:3]!r}")
    return theta, b


def _power_term(ln_lam_i, ln_x_i, k, ln_theta, beta, log_phi_part):
    r""":math:`\lambda_{seg}(\theta) e^{k^2\beta^2/2} \cdot e^{\text{log\_phi\_part}}`, in log space."""
    ln_lam_theta = ln_lam_i - k * (ln_theta - ln_x_i)
    return np.exp(ln_lam_theta + 0.5 * (k * beta) ** 2 + log_phi_part)


def _g(z):
    """Antiderivative of Phi: G(z) = z Phi(z) + phi(z)."""
    return z * special.ndtr(z) + np.exp(-0.5 * z * z) / np.sqrt(2.0 * np.pi)


#: Values (damage state x row x level) per block of :func:`_convolve`: large enough that
#: the ~50 ufunc calls of a block cost little, small enough that its ten work arrays
#: (about 2.6 MB) stay in cache (measured: 2**15 and 2**16 equally fast, 2**13 a third slower).
BLOCK_VALUES = 1 << 15


def _convolve(lnx, lam, ln_theta, beta, *, segments=False, tails=True, block_values=BLOCK_VALUES):
    r"""Exact risk integral of log-log hazard curves against lognormal fragilities, blocked.

    Parameters
    ----------
    lnx, lam : ndarray, shape C + (m,)
        Log levels [ln IM units] and rates [1/yr] of validated curves (broadcast together).
    ln_theta, beta : ndarray, shape F + (n_ds,)
        Log medians [ln IM units] and dispersions [-].
    segments : bool
        Return every segment's contribution instead of their sum.
    tails : bool
        Also compute the extrapolated tails (else they are returned as None).
    block_values : int
        State x row x level values per block (results do not depend on it).

    Returns
    -------
    inner : ndarray, shape B + (n_ds,), or B + (n_ds, m - 1) if ``segments`` [1/yr]
        B = broadcast(C, F).  Per segment (module notes, Cornell et al. 2002 in
        per-segment form): :math:`\lambda_i\Phi(z_i) - \lambda_{i+1}\Phi(z_{i+1})`
        plus the power term in log space where :math:`\lambda_{i+1} > 0`, the linear
        form where only :math:`\lambda_{i+1}` is 0, nothing where both are 0; round-off
        below zero removed; summed over segments with numpy's pairwise sum.
    low, high_ext, high_trunc : ndarray, shape B + (n_ds,) [1/yr]
        Tails (:func:`_tails`); ``low`` and ``high_ext`` None unless ``tails``.

    Notes
    -----
    The work of the closed form is done once where it is shared: logs of the rates
    and the segment slopes once per curve (not per damage state), :math:`\Phi(z)` once
    per level (each inner level closes one segment and opens the next), the linear
    form only on segments that end at a zero rate.  Every value is the same
    floating-point expression as in the unshared form (where an operand is negated,
    exactly: :math:`\ln\lambda_i - k(\ln\theta - \ln x_i) = \ln\lambda_i + k(\ln x_i -
    \ln\theta)` bit for bit), so results are bit for bit independent of blocking.  A
    block holds, per damage state, its rows' levels end to end in one array, so every
    ufunc runs over one long contiguous stretch (the junction of two rows is a dummy
    segment, never read); in-place ufuncs on preallocated arrays.
    """
    m, n_ds = lnx.shape[-1], ln_theta.shape[-1]
    batch = np.broadcast_shapes(lnx.shape[:-1], ln_theta.shape[:-1])
    n_rows = int(np.prod(batch, dtype=np.int64))
    with np.errstate(divide="ignore", invalid="ignore"):
        ln_lam = np.log(lam)
        k = (ln_lam[..., :-1] - ln_lam[..., 1:]) / (lnx[..., 1:] - lnx[..., :-1])  # per curve
    rows = lambda a, n: np.broadcast_to(a, batch + (n,)).reshape(n_rows, n)  # noqa: E731
    lnx_r, lam_r, ln_lam_r = rows(lnx, m), rows(lam, m), rows(ln_lam, m)
    k_r = np.zeros((n_rows, m))  # the last column is the dummy segment between two rows
    k_r[:, :-1] = rows(k, m - 1)
    per_row = ln_theta.ndim > 1  # else one median and dispersion per state for every row
    th_r = rows(ln_theta, n_ds).T[:, :, None] if per_row else ln_theta[:, None, None]
    b_r = rows(beta, n_ds).T[:, :, None] if per_row else beta[:, None, None]
    inner = np.empty((n_rows, n_ds, m - 1) if segments else (n_rows, n_ds))
    ends = np.empty((4, n_ds, n_rows))  # z and Phi(z) at the first and last level
    step = max(1, block_values // (n_ds * m))
    work = _Work(n_ds, min(step, max(n_rows, 1)) * m)
    for r0 in range(0, n_rows, step):
        r1 = min(r0 + step, n_rows)
        blk = slice(r0, r1)
        th, b = (th_r[:, blk], b_r[:, blk]) if per_row else (th_r, b_r)
        seg = _segment_block(work, r1 - r0, m, lnx_r[blk], lam_r[blk], ln_lam_r[blk], k_r[blk], th, b,
                             ends[:, :, blk])
        if segments:
            inner[blk] = seg.transpose(1, 0, 2)
        else:
            inner[blk] = seg.sum(axis=-1).T
    z0, zn, p0, pn = (e.T.reshape(batch + (n_ds,)) for e in ends)
    parts = _tails(lnx, lam, ln_lam, k, ln_theta, beta, z0, zn, p0, pn, extrapolate=tails)
    return (inner.reshape(batch + inner.shape[1:]),) + parts


class _Work:
    """Preallocated work arrays of :func:`_convolve`: per damage state, one block's levels end to end."""

    def __init__(self, n_ds, size):
        self.d, self.z, self.seg, self.kb, self.lo, self.hi, self.a, self.c = np.empty((8, n_ds, size))
        self.up = np.empty((n_ds, size), dtype=bool)
        self.mask, self.bits = np.empty((2, n_ds, size), dtype=np.int64)

    def take(self, size):
        """Views of the first ``size`` values per state; the segment arrays one shorter."""
        full = [w[:, :size] for w in (self.d, self.z)]
        seg = [w[:, :size - 1] for w in (self.seg, self.kb, self.lo, self.hi, self.a, self.c, self.up,
                                         self.mask, self.bits)]
        return full + seg


def _select(out, yes, no, mask, bits):
    """``out = -yes`` where ``mask`` is -1 (all bits set), ``no`` where it is 0.

    A bit-exact, branch-free choice on the float bits; ``mask`` is complemented on exit.
    """
    np.negative(yes, out=out)
    o = out.view(np.int64)
    np.bitwise_and(o, mask, out=o)
    np.invert(mask, out=mask)
    np.bitwise_and(no.view(np.int64), mask, out=bits)
    np.bitwise_or(o, bits, out=o)


def _segment_block(work, n, m, lnx, lam, ln_lam, k, th, b, ends):
    """Segment contributions (n_ds, n, m - 1) [1/yr] of one block of rows (see :func:`_convolve`).

    Same expressions as the per-segment closed form (module notes): ``z`` at the levels,
    ``lo, hi = z_i + k beta, z_{i+1} + k beta``, ``log(Phi(hi) - Phi(lo))`` through the
    survival functions when ``lo > 0``, the power term
    ``exp(ln lambda_i - k (ln theta - ln x_i) + (k beta)^2 / 2 + log diff)``.  Position
    ``j`` of a flat array is level ``j % m`` of row ``j // m``; segment ``j`` joins
    positions ``j`` and ``j + 1``.
    """
    size = n * m
    d, z, seg, kb, lo, hi, a, c, up, mask, bits = work.take(size)
    n_ds = d.shape[0]
    grid = lambda w: w.reshape(n_ds, n, m)  # noqa: E731
    np.subtract(lnx, th, out=grid(d))  # ln x - ln theta
    np.divide(grid(d), b, out=grid(z))
    linear = _linear_segments(lam, grid(z), b, lnx, m)
    kf = k.reshape(-1)[:-1]
    np.multiply(kf, b.reshape(n_ds, -1)[:, :1] if b.shape[1] == 1 else _flat(b, n_ds, n, m)[:, :-1], out=kb)
    np.add(z[:, :-1], kb, out=lo)
    np.add(z[:, 1:], kb, out=hi)
    ends[0], ends[1] = grid(z)[:, :, 0], grid(z)[:, :, -1]
    special.ndtr(z, out=z)
    ends[2], ends[3] = grid(z)[:, :, 0], grid(z)[:, :, -1]
    z *= lam.reshape(-1)
    np.subtract(z[:, :-1], z[:, 1:], out=seg)  # lambda_i Phi(z_i) - lambda_{i+1} Phi(z_{i+1})
    with np.errstate(divide="ignore", invalid="ignore"):
        np.greater(lo, 0.0, out=up)  # both in the upper tail: survival functions
        np.negative(up.view(np.int8), out=mask, casting="unsafe")
        _select(a, lo, hi, mask, bits)  # a = -lo if up else hi (mask complemented)
        np.invert(mask, out=mask)
        _select(c, hi, lo, mask, bits)  # c = -hi if up else lo
        np.less_equal(hi, lo, out=up)
        up[:, m - 1::m] = False  # the dummy segments between rows
        empty = np.nonzero(up) if up.any() else None
        special.log_ndtr(a, out=a)
        special.log_ndtr(c, out=c)
        c -= a
        np.exp(c, out=c)
        np.negative(c, out=c)
        np.log1p(c, out=c)
        np.add(a, c, out=c)  # log(Phi(hi) - Phi(lo))
        if empty is not None:
            c[empty] = -np.inf
        np.multiply(kf, d[:, :-1], out=lo)  # k (ln x_i - ln theta) = -k (ln theta - ln x_i)
        lo += ln_lam.reshape(-1)[:-1]  # ln lambda_seg(theta)
        np.multiply(kb, kb, out=hi)
        hi *= 0.5
        lo += hi
        lo += c
        np.exp(lo, out=lo)
        seg += lo
    if linear is not None:
        idx, values = linear
        seg[idx] = values
    np.maximum(seg, 0.0, out=seg)  # remove round-off below zero
    return work.seg[:, :size].reshape(n_ds, n, m)[:, :, :-1]


def _flat(a, n_ds, n, m):
    """Per-row values (n_ds, n, 1) repeated over the levels, flat (n_ds, n * m)."""
    return np.broadcast_to(a, (n_ds, n, m)).reshape(n_ds, n * m)


def _linear_segments(lam, z, b, lnx, m):
    r"""Where a segment ends at a zero rate: (flat index, contribution) of the linear form, or None.

    A segment from :math:`\lambda_i > 0` to 0 is linear in :math:`\ln x`:
    :math:`\lambda_i\beta/\Delta\,[G(z_{i+1}) - G(z_i)]`; from 0 to 0 it adds 0.  ``z`` is
    (n_ds, n, m), ``b`` (n_ds, n or 1, 1).
    """
    zero_end = lam[:, 1:] == 0
    if not zero_end.any():
        return None
    r, i = np.nonzero(zero_end)
    n_ds = z.shape[0]
    s = np.repeat(np.arange(n_ds), len(r))
    r, i = np.tile(r, n_ds), np.tile(i, n_ds)
    la, bb = lam[r, i], b[s, r if b.shape[1] > 1 else 0, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        values = la * bb / (lnx[r, i + 1] - lnx[r, i]) * (_g(z[s, r, i + 1]) - _g(z[s, r, i]))
    return (s, r * m + i), np.where(la > 0, values, 0.0)


def _tails(lnx, lam, ln_lam, k, ln_theta, beta, z0, zn, p0, pn, *, extrapolate=True):
    """Extrapolated lower/upper tail contributions and the truncated upper term [1/yr].

    ``z0, zn`` and ``p0, pn`` are z and Phi(z) at the first and last level, ``k`` the
    segment slopes (shapes B + (n_ds,) and C + (m - 1,)).  Returns (low, high_ext,
    high_trunc); the first two are None unless ``extrapolate``.
    """
    ln_ = lam[..., -1:]
    high_trunc = np.where(ln_ > 0, ln_ * pn, 0.0)
    if not extrapolate:
        return None, None, high_trunc
    x0, xn = lnx[..., :1], lnx[..., -1:]
    x1 = lnx[..., 1:2]
    l0, l1 = lam[..., :1], lam[..., 1:2]
    k0, kn = k[..., :1], k[..., -1:]
    with np.errstate(divide="ignore", invalid="ignore"):
        low_power = _power_term(ln_lam[..., :1], x0, k0, ln_theta, beta, special.log_ndtr(z0 + k0 * beta)) - l0 * p0
        high_ext = ln_ * pn + _power_term(ln_lam[..., -1:], xn, kn, ln_theta, beta, special.log_ndtr(-(zn + kn * beta)))
    low = np.where(l1 > 0, low_power, 0.0)
    linear = (l1 == 0) & (l0 > 0)
    if linear.any():
        with np.errstate(divide="ignore", invalid="ignore"):
            low = np.where(linear, l0 * beta / (x1 - x0) * _g(z0), low)
    low = np.maximum(np.nan_to_num(low, nan=0.0), 0.0)
    high_ext = np.where(ln_ > 0, high_ext, 0.0)
    return low, high_ext, high_trunc


def _prepare(im_levels, rates, medians, betas, tail):
    if tail not in TAIL_POLICIES:
        raise ValueError(f"tail must be one of {TAIL_POLICIES}, got {tail!r}")
    x, lam = validate_curve(im_levels, rates)
    theta, b = _check_fragility(medians, betas)
    if theta.ndim == 0:
        raise ValueError("medians must have a trailing damage-state axis, got a scalar")
    theta, b = np.broadcast_arrays(theta, b)
    return x, lam, theta, b


def damage_state_rates(im_levels, rates, medians, betas, tail="extrapolate", *,
                       envelope=False, diagnostics=False, workers=1):
    r"""Annual rates [1/yr] of reaching or exceeding each damage state.

    Parameters
    ----------
    im_levels : array_like, shape (n_levels,) or C + (n_levels,) [IM units, e.g. g]
    rates : array_like, shape (n_levels,) or C + (n_levels,) [1/yr]
        Hazard curves (annual exceedance rates), validated.
    medians : array_like, shape F + (n_ds,) [IM units]
        Fragility medians :math:`\theta`.
    betas : array_like, shape F + (n_ds,) [-]
        Lognormal standard deviations :math:`\beta > 0`.
    tail : {"extrapolate", "truncate"}
        Tail policy outside the tabulated range (module notes).
    envelope : bool
        If True, damage state :math:`j` uses the upper envelope
        :math:`\max_{l \ge j} P(DS \ge l \mid x)` so that crossing curves still give
        ordered probabilities.  The envelope is :math:`\Phi(\max_{l \ge j} z_l)`; every
        segment of the curve and both extrapolated tails are split at the crossing
        intensities that fall inside them (crossings outside a piece add nothing), so
        the integral is exact everywhere; the top level and its rate are used as
        tabulated (the truncated top mass is :math:`\lambda_n` times the envelope at
        :math:`x_n`).
    diagnostics : bool
        Also return the extrapolated tail shares.
    workers : int
        Threads for curves with positive rates (:func:`quakefolio.core.risk_pieces.piece_sums`);
        results do not depend on it.

    Returns
    -------
    rates_ds : ndarray, shape broadcast(C, F) + (n_ds,) [1/yr]
    (rates_ds, share_below, share_above) if ``diagnostics``
        Shares of the extrapolated :math:`\lambda_{ds}` that come from intensities
        below the first and above the last tabulated level [-].

    Notes
    -----
    Exact risk integral, module notes; Cornell et al. (2002), Eq. 11 for a pure power
    law.  Curves whose rates are all positive are integrated in the telescoped form of
    :mod:`quakefolio.core.risk_pieces` (a sum of positive per-piece terms), the others
    (and the envelope) per segment; both are the same closed form and agree to
    round-off, the summation order differing: about 1e-15 relative on ordinary curves, up
    to about 1e-13 where the exponents of the power terms reach hundreds (steep curves
    and wide dispersions), as each exponential carries a relative error of
    :math:`\epsilon` times its exponent.
    """
    x, lam, theta, b = _prepare(im_levels, rates, medians, betas, tail)
    lnx = _log_levels(x)
    ln_theta = np.log(theta)
    if envelope:
        inner, low, high_ext, high_trunc = _envelope_parts(x, lam, ln_theta, b)
        total_ext = inner + low + high_ext
        out = total_ext if tail == "extrapolate" else inner + high_trunc
    else:
        out, low, high_ext, total_ext = _summed(lnx, lam, ln_theta, b, tail, diagnostics, workers)
    if not diagnostics:
        return out
    with np.errstate(divide="ignore", invalid="ignore"):
        share_below = np.where(total_ext > 0, low / total_ext, 0.0)
        share_above = np.where(total_ext > 0, high_ext / total_ext, 0.0)
    return out, share_below, share_above


def _log_levels(x):
    """ln x, taken once per distinct curve of levels where ``x`` is broadcast (shared levels)."""
    own = tuple(slice(0, 1) if st == 0 else slice(None) for st in x.strides[:-1])
    return np.broadcast_to(np.log(x[own]), x.shape)


def _summed(lnx, lam, ln_theta, b, tail, diagnostics, workers):
    """Rates under ``tail`` and, if ``diagnostics``, the extrapolated tails and total (else None).

    Rows (curves x fragility rows) with positive rates throughout go to
    :func:`~quakefolio.core.risk_pieces.piece_sums`, the others (a curve reaching a zero
    rate) to :func:`_convolve`.
    """
    m, n_ds = lnx.shape[-1], ln_theta.shape[-1]
    batch = np.broadcast_shapes(lnx.shape[:-1], lam.shape[:-1], ln_theta.shape[:-1])
    n_rows = int(np.prod(batch, dtype=np.int64))
    rows = lambda a, n: np.broadcast_to(a, batch + (n,)).reshape(n_rows, n)  # noqa: E731
    lnx_r, lam_r = rows(lnx, m), rows(lam, m)
    per_row = ln_theta.ndim > 1
    th_r, b_r = (rows(ln_theta, n_ds), rows(b, n_ds)) if per_row else (ln_theta, b)
    parts = np.empty((4 if diagnostics else 1, n_rows, n_ds))
    positive = lam_r[:, -1] > 0  # non-increasing curves: positive throughout
    if positive.all():
        _fast_rows(parts, slice(None), lnx_r, lam_r, th_r, b_r, tail, diagnostics, workers)
    elif positive.any():
        sel = np.flatnonzero(positive)
        _fast_rows(parts, sel, lnx_r[sel], lam_r[sel], th_r[sel] if per_row else th_r,
                   b_r[sel] if per_row else b_r, tail, diagnostics, workers)
    if not positive.all():
        sel = np.flatnonzero(~positive)
        inner, low, high_ext, high_trunc = _convolve(lnx_r[sel], lam_r[sel], th_r[sel] if per_row else th_r,
                                                     b_r[sel] if per_row else b_r,
                                                     tails=tail == "extrapolate" or diagnostics)
        total_ext = inner + low + high_ext if high_ext is not None else None
        parts[0, sel] = total_ext if tail == "extrapolate" else inner + high_trunc
        if diagnostics:
            parts[1:, sel] = low, high_ext, total_ext
    out = [p.reshape(batch + (n_ds,)) for p in parts]
    return tuple(out) if diagnostics else (out[0], None, None, None)


def _fast_rows(parts, sel, lnx, lam, ln_theta, b, tail, diagnostics, workers):
    """Fill ``parts[:, sel]`` (rate; low tail, high tail, extrapolated total) by the telescoped sums."""
    truncate = tail == "truncate"
    inner, low_p, high_p, p0, pn = piece_sums(lnx, lam, ln_theta, b, truncate=truncate and not diagnostics,
                                              ends=diagnostics, workers=workers)
    low_p = np.nan_to_num(low_p, nan=0.0)  # as the per-segment tails: beyond the doubles, the largest
    if not diagnostics:
        parts[0, sel] = inner + low_p + high_p if not truncate else inner + low_p
        return
    head, top = lam[:, :1] * p0, lam[:, -1:] * pn  # lambda_0 Phi(z_0), lambda_n Phi(z_n)
    total_ext = inner + low_p + high_p
    parts[0, sel] = inner + head if truncate else total_ext
    parts[1, sel] = np.maximum(np.nan_to_num(low_p - head, nan=0.0), 0.0)
    parts[2, sel] = top + high_p
    parts[3, sel] = total_ext


def _envelope_parts(x, lam, ln_theta, b):
    r"""Risk-integral parts for the upper-envelope fragility (see damage_state_rates).

    The integration range is cut into pieces, each under one power law (or one
    zero-ending linear segment) of the curve: the lower tail :math:`(-\infty, x_0]`, the
    tabulated segments, the upper tail :math:`[x_{n-1}, \infty)`.  Every piece is split
    further at every pairwise crossing of the fragility curves, clipped into the piece;
    between two break points the envelope is one lognormal curve, so the exact
    per-segment integral applies, evaluated on the piece's own power law (no
    re-interpolation, the levels stay exact).  Sub-pieces of zero width (crossings
    outside a piece, parallel curves) contribute exactly 0.
    """
    n_ds = ln_theta.shape[-1]
    batch = np.broadcast_shapes(x.shape[:-1], ln_theta.shape[:-1])
    lnx = np.log(x)
    with np.errstate(divide="ignore", invalid="ignore"):
        ln_lam = np.log(lam)
        k = (ln_lam[..., :-1] - ln_lam[..., 1:]) / np.diff(lnx, axis=-1)
    cat = lambda *parts: np.concatenate(parts, axis=-1)  # noqa: E731
    inf = np.full(lnx.shape[:-1] + (1,), np.inf)
    # pieces p = 0 (lower tail), 1..n-1 (segments), n (upper tail): bounds, anchor, law
    lo = cat(-inf, lnx)
    hi = cat(lnx, inf)
    ax = cat(lnx[..., :1], lnx[..., :-1], lnx[..., -1:])
    al = cat(lam[..., :1], lam[..., :-1], lam[..., -1:])
    nl = cat(lam[..., 1:2], lam[..., 1:], lam[..., -1:])  # rate at the piece's other end
    kp = cat(k[..., :1], k, k[..., -1:])
    dp = cat(np.diff(lnx, axis=-1)[..., :1], np.diff(lnx, axis=-1), np.diff(lnx, axis=-1)[..., -1:])
    # all pairwise crossings (ln IM); none where parallel (equal betas)
    ii, jj = np.triu_indices(n_ds, k=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        cross = (b[..., jj] * ln_theta[..., ii] - b[..., ii] * ln_theta[..., jj]) / (b[..., jj] - b[..., ii])
    cross = np.where(np.isfinite(cross), cross, -np.inf)
    cross = np.broadcast_to(cross, batch + cross.shape[-1:])[..., None, :]  # (B, 1, P)
    piece = lambda a: np.broadcast_to(a, batch + a.shape[-1:])[..., :, None]  # noqa: E731  (B, n+1, 1)
    lo_b, hi_b = piece(lo), piece(hi)
    pts = np.sort(cat(lo_b, np.clip(cross, lo_b, hi_b), hi_b), axis=-1)  # (B, n+1, P+2)
    u, v = pts[..., :-1], pts[..., 1:]  # (B, n+1, P+1)
    with np.errstate(invalid="ignore"):
        rep = np.where(np.isfinite(u) & np.isfinite(v), 0.5 * (u + v), np.where(np.isfinite(v), v - 1.0, u + 1.0))
    # the curve dominant in each sub-piece for state j: argmax of z_l over l >= j
    z_rep = (rep[..., None] - ln_theta[..., None, None, :]) / b[..., None, None, :]  # (B, n+1, P+1, l)
    upper_mask = np.triu(np.ones((n_ds, n_ds), dtype=bool))  # [j, l] = l >= j
    zz = np.where(upper_mask, z_rep[..., None, :], -np.inf)  # (B, n+1, P+1, j, l)
    dom = np.moveaxis(np.argmax(zz, axis=-1), -1, -3)  # (B, j, n+1, P+1)
    full = batch + (n_ds,) + dom.shape[-2:]
    th_d = np.take_along_axis(np.broadcast_to(ln_theta[..., :, None, None], full), dom, axis=-3)
    b_d = np.take_along_axis(np.broadcast_to(b[..., :, None, None], full), dom, axis=-3)
    law = [piece(a)[..., None, :, :] for a in (ax, al, nl, kp, dp)]  # (B, 1, n+1, 1)
    contrib = _subpiece_integral(u[..., None, :, :], v[..., None, :, :], *law, th_d, b_d).sum(axis=-1)
    low, inner, high_ext = contrib[..., 0], contrib[..., 1:-1].sum(axis=-1), contrib[..., -1]
    # the top-level mass under truncation: envelope at the top level itself
    z_top = (lnx[..., -1:] - ln_theta) / b  # (B, l)
    env_top = np.max(np.where(upper_mask, z_top[..., None, :], -np.inf), axis=-1)  # (B, j)
    lam_top = lam[..., -1:]
    high_trunc = np.where(lam_top > 0, lam_top * special.ndtr(env_top), 0.0)
    return inner, low, high_ext, high_trunc


def _subpiece_integral(u, v, a, la, lb, k, delta, ln_theta, beta):
    r"""Exact :math:`\int_u^v \Phi(z)\,|d\lambda|` on part of one piece of the hazard curve [1/yr].

    The piece follows :math:`\ln\lambda(s) = \ln\lambda_a - k(s - a)` in :math:`s = \ln x`
    (power law, where its other end rate ``lb`` is positive) or falls linearly in
    :math:`s` to zero over ``delta`` (where ``lb`` is 0 and ``la`` positive); otherwise
    it contributes nothing.  ``u`` may be :math:`-\infty` and ``v`` :math:`+\infty` (tails;
    :math:`\lambda\Phi` vanishes there); ``v <= u`` gives 0.  Same closed forms as
    :func:`_segment_block` (module notes), with the end rates taken on the
    piece's law.
    """
    zu = (u - ln_theta) / beta
    zv = (v - ln_theta) / beta
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ln_la = np.log(la)
        end_u = np.where(np.isneginf(u), 0.0, np.exp(ln_la - k * (u - a) + special.log_ndtr(zu)))
        end_v = np.where(np.isposinf(v), 0.0, np.exp(ln_la - k * (v - a) + special.log_ndtr(zv)))
        power = end_u - end_v + _power_term(ln_la, a, k, ln_theta, beta, log_ndtr_diff(zu + k * beta, zv + k * beta))
        g_u = np.where(np.isneginf(zu), 0.0, _g(zu))
        linear = la * beta / delta * (_g(zv) - g_u)
    out = np.where(lb > 0, power, np.where(la > 0, linear, 0.0))
    out = np.where(v > u, out, 0.0)
    return np.maximum(out, 0.0)  # remove round-off below zero


def risk_disaggregation(im_levels, rates, medians, betas, tail="extrapolate"):
    r"""Share of each damage state's rate contributed by each hazard segment [-].

    Parameters
    ----------
    As :func:`damage_state_rates`.

    Returns
    -------
    shares : ndarray, shape broadcast(C, F) + (n_ds, n_levels + 1)
        Bin 0 is the tail below the first level, bins 1..n_levels-1 the tabulated
        segments :math:`[x_{i-1}, x_i]`, bin n_levels the tail above the last level
        (under ``tail="truncate"``: exceedances of the top level counted at it). Each
        row sums to 1 (0 where the damage-state rate is 0).

    Notes
    -----
    The segment contributions are the exact per-segment integrals of
    :func:`damage_state_rates` (Cornell et al. 2002, per-segment form).
    """
    x, lam, theta, b = _prepare(im_levels, rates, medians, betas, tail)
    lnx = np.log(x)
    ln_theta = np.log(theta)
    seg, low, high_ext, high_trunc = _convolve(lnx, lam, ln_theta, b, segments=True, tails=tail == "extrapolate")
    if tail == "truncate":
        low = np.zeros_like(high_trunc)
        high = high_trunc
    else:
        high = high_ext
    parts = np.concatenate([low[..., None], seg, high[..., None]], axis=-1)
    total = parts.sum(axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, parts / total, 0.0)


def risk_targeted_im(im_levels, rates, beta=0.6, prob_at_im=0.10, target_prob=0.01, years=50,
                     tail="extrapolate"):
    r"""Risk-targeted intensity [IM units] for a lognormal collapse fragility.

    The risk-targeted IM :math:`x_{RT}` is the intensity at which a generic collapse
    fragility with dispersion ``beta`` has probability ``prob_at_im`` of collapse, chosen
    so that the resulting annual collapse rate gives probability ``target_prob`` in
    ``years`` (ASCE/SEI 7-16 Section 21.2.1.2 after Luco et al. 2007: beta 0.6, 10% at
    the IM, 1% in 50 years).

    Parameters
    ----------
    im_levels, rates : array_like, shape (n_levels,) or C + (n_levels,)
    beta : float [-]
    prob_at_im : float in (0, 1)
    target_prob : float in (0, 1)
    years : float [yr]
    tail : {"extrapolate", "truncate"}

    Returns
    -------
    ndarray, shape C [IM units]
        NaN where the target cannot be bracketed (hazard too low or too high for the
        target within 8 dispersions of the tabulated range).

    Notes
    -----
    With median :math:`\theta = x_{RT}\,e^{-\Phi^{-1}(p)\beta}` the collapse rate
    :math:`\lambda_c(\theta)` (exact risk integral) is decreasing in :math:`\theta`; the
    root of :math:`\lambda_c(\theta) = -\ln(1 - P_t)/t` is found by vectorised bisection
    in :math:`\ln\theta` (70 halvings, width below 1e-15 relative).
    """
    if not 0 < prob_at_im < 1 or not 0 < target_prob < 1:
        raise ValueError(f"prob_at_im and target_prob must lie in (0, 1), got {prob_at_im}, {target_prob}")
    if not beta > 0:
        raise ValueError(f"beta must be positive, got {beta}")
    x, lam = validate_curve(im_levels, rates)
    target = rate_from_prob(target_prob, years)
    lnx = np.log(x)
    lo = lnx[..., 0] - 8 * beta
    hi = lnx[..., -1] + 8 * beta

    def collapse_rate(ln_theta):
        return damage_state_rates(x, lam, np.exp(ln_theta)[..., None], np.full(ln_theta.shape + (1,), beta),
                                  tail=tail)[..., 0]

    f_lo = collapse_rate(lo) - target  # positive if bracketed (low median: high rate)
    f_hi = collapse_rate(hi) - target
    ok = (f_lo >= 0) & (f_hi <= 0)
    for _ in range(70):
        mid = 0.5 * (lo + hi)
        above = collapse_rate(mid) > target
        lo = np.where(above, mid, lo)
        hi = np.where(above, hi, mid)
    ln_theta = 0.5 * (lo + hi)
    x_rt = np.exp(ln_theta + special.ndtri(prob_at_im) * beta)
    return np.where(ok, x_rt, np.nan)
