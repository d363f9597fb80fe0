r"""Damage-state rates as sums of positive per-piece terms: the telescoped risk integral.

The hazard curve is a power law :math:`\lambda_a (x/x_a)^{-k_p}` on each piece :math:`p`
of the IM axis: the lower tail :math:`(0, x_0]` (p = 0), the tabulated segments
:math:`[x_{p-1}, x_p]` (p = 1 .. m-1) and the upper tail :math:`[x_{m-1}, \infty)` (p = m);
the tails continue the end segments' slopes.  Integrating :math:`\int \Phi(z)\,|d\lambda|`
by parts on each piece (Cornell et al. 2002, Eq. 11, per piece; the module notes of
:mod:`quakefolio.core.risk`), the boundary terms :math:`\lambda\Phi(z)` cancel between
neighbouring pieces and with the tails' own, so the rate is a sum of positive terms:

.. math:: \lambda_{ds} = \sum_p C_p \left[\Phi(v_p + k_p\beta) - \Phi(u_p + k_p\beta)\right],
          \qquad C_p = \lambda_a\,e^{k_p\beta z_a + k_p^2\beta^2/2},

with :math:`u_p, v_p` the piece's bounds in :math:`z = (\ln x - \ln\theta)/\beta`
(:math:`\mp\infty` for the tails) and :math:`z_a` its anchor.  Under the truncated tail
policy the lower-tail piece is replaced by :math:`\lambda_0\Phi(z_0)` (the same
expression with :math:`k = 0`) and the upper-tail piece by nothing; the tail pieces and
:math:`\Phi(z_0), \Phi(z_{m-1})` also give the tail diagnostics of
:func:`quakefolio.core.risk.damage_state_rates`.

Evaluation.  With :math:`\sigma = -\operatorname{sign}(lo)` the difference is
:math:`\sigma[\Phi(\sigma\,hi) - \Phi(\sigma\,lo)]`: survival functions where both
arguments are positive, so both terms are the smaller tail values and keep their relative
accuracy (multiplying by :math:`\pm 1` is exact).  A plain difference of :math:`\Phi`
values is as well conditioned as a log-space difference
:math:`\ln\Phi(a) + \ln(1 - e^{\ln\Phi(c) - \ln\Phi(a)})` (both lose the digits of
:math:`\Phi(a)/[\Phi(a) - \Phi(c)]`; the logs carry an absolute error of
:math:`\epsilon|\ln\Phi|` besides), so log space is used only where the plain product
leaves the range of doubles: where :math:`\ln C_p >` :data:`LOG_COEF_MAX`, the term is
:math:`\exp(\ln C_p + \ln[\Phi(hi) - \Phi(lo)])` with log-space :math:`\Phi`.  Elsewhere a
:math:`\Phi` below the normal range (arguments below about -37.5) changes a term by less
than :math:`e^{600} \cdot 2^{-1022} \approx 10^{-47}` per year.

Cost: two :math:`\Phi` per segment and one per tail piece (the other bound is
:math:`\mp\infty`): :math:`2m` evaluations per (curve, damage state), two per tabulated
level; one exponential per piece; no logarithm.  The pieces of a row are computed by one
compiled loop (:mod:`quakefolio.core.risk_loops`, numba: the bounds, :math:`\ln C_p`, the
two normal-CDF calls and the difference per piece, without the twenty-odd array passes the
same arithmetic costs in numpy), the exponentials by numpy over a chunk of rows, and a second
compiled loop adds each row's pieces in order.  A row depends on its own inputs only, so
results are bit for bit the same whatever the chunks, the split of rows between calls or
the number of threads.  Threads take contiguous runs of rows (the compiled loops, numpy and
scipy release the GIL).

Negligible pieces.  Where every row shares its levels and fragility (one building class
against many sites), a segment piece far below the fragility's median is left out when it
cannot change any row's rate by more than :data:`NEGLIGIBLE` of it.  The piece is
:math:`\int \lambda f\,dx` over its segment (:math:`f` the lognormal density), so the pieces
1 .. p-1 together are at most :math:`\max\lambda \cdot \Phi(z_{p-1})`, while the rate is at
least :math:`\sum_q \lambda_q [\Phi(z_q) - \Phi(z_{q-1})]` (the curve does not increase);
the first p of a damage state is the last one for which the first bound stays below
:data:`NEGLIGIBLE` times the second for every row of the call.  The lower-tail piece is always
evaluated (it gives the tail diagnostics).  On hazard grids reaching far below the
fragility (the default grid starts at 5e-4 g) that leaves out a quarter to a third of the
evaluations; a rate moves by at most :data:`NEGLIGIBLE` relative, which is below its last
bit.  Which pieces are left out depends on the rows of the call, never on the chunks or
the threads.

Scope: curves with strictly positive rates (a segment ending at a zero rate is linear in
:math:`\ln x`, see :mod:`quakefolio.core.risk`, which routes such curves to its
per-segment kernel).

Reference: Cornell, C.A., Jalayer, F., Hamburger, R.O., Foutch, D.A. (2002). Probabilistic
basis for 2000 SAC FEMA steel moment frame guidelines. J. Struct. Eng. 128(4), 526-533.
"""
from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from quakefolio.core.lazy import lazy_module

special = lazy_module("scipy.special")  # imported on first use (core/lazy.py)
loops = lazy_module("quakefolio.core.risk_loops")  # numba, compiled code loaded on first use

__all__ = ["piece_sums", "log_ndtr_diff", "PHI_PER_LEVEL"]

#: :math:`\Phi` evaluations the exact integral needs per (curve, damage state, level):
#: 2m per curve and state (two per segment, one per tail piece), see the module notes.
PHI_PER_LEVEL = 2

#: Largest :math:`\ln C_p` evaluated as a plain product (module notes); above it, log space.
LOG_COEF_MAX = 600.0

#: Share of a rate below which leading segment pieces are left out (module notes, Negligible pieces):
#: 2**-60, about 8.7e-19, far below the last bit of a double.
NEGLIGIBLE = 2.0 ** -60

#: Fewest rows a thread takes: a row costs a few microseconds (two normal-CDF evaluations per
#: level and state), starting a thread about a hundred.
MIN_ROWS_PER_THREAD = 32

#: Pieces (row x damage state x piece) per chunk of the two passes: the chunk's exponents and
#: factors (2 x 512 KB) stay in the L2 cache.
CHUNK_VALUES = 1 << 16

_THREAD = threading.local()  # per thread: the work arrays of the two passes (_scratch)


def log_ndtr_diff(lo, hi):
    """log(Phi(hi) - Phi(lo)) for hi >= lo, accurate in both tails (-inf where hi <= lo)."""
    lo, hi = np.broadcast_arrays(lo, hi)
    upper = lo > 0  # both in the upper tail: use survival functions
    a = np.where(upper, -lo, hi)  # log Phi(a) is the larger term
    c = np.where(upper, -hi, lo)
    la = special.log_ndtr(a)
    lc = special.log_ndtr(c)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = la + np.log1p(-np.exp(lc - la))
    return np.where(hi <= lo, -np.inf, out)


def piece_sums(lnx, lam, ln_theta, beta, *, truncate=False, ends=False, workers=1):
    r"""Telescoped risk integral of curves with positive rates, per (row, damage state) [1/yr].

    Parameters
    ----------
    lnx, lam : ndarray, shape (n, m)
        Log levels [ln IM units] and strictly positive rates [1/yr] of validated curves
        (rows may be broadcast: a row shared by all is taken once).
    ln_theta, beta : ndarray, shape (n_ds,) or (n, n_ds)
        Log medians [ln IM units] and dispersions [-], per state or per row and state.
    truncate : bool
        Truncated tail policy (module notes) instead of extrapolated tails.
    ends : bool
        Also return :math:`\Phi(z_0)` and :math:`\Phi(z_{m-1})` (two more evaluations per
        row and state).
    workers : int
        Threads over contiguous runs of rows (the compiled loop releases the GIL); results
        do not depend on it.

    Returns
    -------
    inner : ndarray, shape (n, n_ds) [1/yr]
        Sum of the segment pieces p = 1 .. m-1.
    low, high : ndarray, shape (n, n_ds) [1/yr]
        Lower-tail piece (:math:`\lambda_0\Phi(z_0)` if ``truncate``) and upper-tail piece
        (0 if ``truncate``).
    p0, pn : ndarray, shape (n, n_ds) [-], or None unless ``ends``
    """
    n, m = lam.shape
    n_ds = ln_theta.shape[-1]
    out = np.empty((5 if ends else 3, n, n_ds))
    if n == 0:
        return tuple(out) + (() if ends else (None, None))
    per_row = ln_theta.ndim > 1
    same_levels = _same_rows(lnx)
    shared_rows = not per_row and same_levels
    keep = _kept_pieces(lnx[0], lam, ln_theta, beta) if shared_rows else np.ones((n_ds, m + 1), dtype=bool)
    lnx_r = _own_rows(lnx[:1] if same_levels else lnx)  # one row where every row holds the same levels
    with np.errstate(divide="ignore"):
        ln_lam = np.log(_own_rows(lam))
    th, b = (np.ascontiguousarray(a, dtype=float).reshape(-1, n_ds) for a in (ln_theta, beta))
    offsets = np.concatenate([[0], np.cumsum(keep.sum(axis=1))]).astype(np.int64)  # each state's slots in a row
    z_shared = np.empty((0, n_ds, m))
    if len(lnx_r) == 1 and len(th) == 1:  # every row's z, by the kernel's own expression
        z_shared = ((lnx_r[0][None, :] - th[0][:, None]) / b[0][:, None])[None]
    first = np.sum(np.cumprod(~keep[:, 1:-1], axis=1), axis=1) + 1  # first segment piece evaluated per state
    args = (loops.PHI, loops.ERFC, loops.LOG_PHI, lnx_r, ln_lam, th, b, z_shared, first.astype(np.int64), offsets,
            bool(truncate), bool(ends), LOG_COEF_MAX)
    step = max(1, CHUNK_VALUES // int(offsets[-1]))  # rows per chunk

    def run(r0, r1):
        c, d = _scratch(min(step, r1 - r0), int(offsets[-1]))
        for a in range(r0, r1, step):
            z = min(a + step, r1)
            loops.pieces_into(*args, a, z, c, d, out)
            with np.errstate(over="ignore"):  # a log-space term beyond the doubles: inf, as the product
                np.exp(c[:z - a], out=c[:z - a])
            loops.sums_into(offsets, c, d, a, z, out)

    workers = max(1, min(int(workers), -(-n // MIN_ROWS_PER_THREAD)))
    bounds = np.linspace(0, n, workers + 1).astype(np.int64)
    if workers == 1:
        run(0, n)
    else:
        with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="quakefolio-risk") as pool:
            list(pool.map(lambda i: run(int(bounds[i]), int(bounds[i + 1])), range(workers)))
    return tuple(out) + (() if ends else (None, None))


def _scratch(rows, count):
    """Two work arrays (rows, count) of the calling thread, kept between calls (no fresh pages per call)."""
    size = 2 * rows * count
    buf = getattr(_THREAD, "scratch", None)
    if buf is None or buf.size < size:
        buf = _THREAD.scratch = np.empty(max(size, 2 * CHUNK_VALUES))
    return buf[:size].reshape(2, rows, count)


def _own_rows(a):
    """``a`` (n, m) as a C-contiguous float array, one row where every row is the same broadcast row."""
    if len(a) > 1 and a.strides[0] == 0:
        a = a[:1]
    return np.ascontiguousarray(a, dtype=float)


def _kept_pieces(lnx, lam, ln_theta, beta):
    r"""Pieces (damage state, piece) evaluated for rows sharing levels ``lnx`` (m,) and fragility (module notes).

    Segment pieces 1 .. p-1 of a state are left out when, for every row,
    :math:`\max\lambda \cdot \Phi(z_{p-1}) \le` :data:`NEGLIGIBLE` :math:`\cdot
    \sum_q \lambda_q [\Phi(z_q) - \Phi(z_{q-1})]`, the right side halved against round-off.
    """
    n_ds, m = ln_theta.shape[-1], lnx.shape[-1]
    keep = np.ones((n_ds, m + 1), dtype=bool)
    z = (lnx[None, :] - ln_theta[:, None]) / beta[:, None]  # (n_ds, m)
    phi = special.ndtr(z)
    rise = np.diff(phi, axis=1)  # (n_ds, m - 1), >= 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        lower = 0.5 * np.einsum("rq,sq->rs", lam[:, 1:], rise)  # (n, n_ds): a lower bound of each rate (no BLAS threads)
        share = np.min(lower / lam[:, :1], axis=0)  # (n_ds,); the largest rate of a curve is its first
    share = np.where(np.isfinite(share) & (share > 0), share, 0.0)
    below = (phi <= NEGLIGIBLE * share[:, None]) & (share[:, None] > 0)  # levels with negligible pieces beneath
    first = np.sum(np.cumprod(below, axis=1), axis=1)  # the pieces 1 .. first-1 are left out
    for s in range(n_ds):
        keep[s, 1:max(int(first[s]), 1)] = False
    return keep


def _same_rows(lnx):
    """Whether every row of ``lnx`` (n, m) holds the same levels (a broadcast row is seen without a comparison)."""
    if len(lnx) < 2 or lnx.strides[0] == 0:
        return True
    return bool(np.array_equal(lnx[1:], np.broadcast_to(lnx[:1], (len(lnx) - 1, lnx.shape[1]))))
