r"""Damage-state rates as sums of positive per-piece terms: the telescoped risk integral, blocked.

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
level; one exponential per piece; no logarithm, no branch.  A block holds, per damage
state and piece, a run of rows (contiguous, so every ufunc runs over the whole block at
once); each row's pieces are added in order; every value is computed by the same
expressions whatever the blocking or the number of threads, so results are bit for bit
independent of both.  Threads take contiguous runs of blocks (numpy and scipy release the
GIL inside their loops).

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
bit.  Which pieces are left out depends on the rows of the call, never on the blocking or
the threads.

Scope: curves with strictly positive rates (a segment ending at a zero rate is linear in
:math:`\ln x`, see :mod:`quakefolio.core.risk`, which routes such curves to its
per-segment kernel).

Reference: Cornell, C.A., Jalayer, F., Hamburger, R.O., Foutch, D.A. (2002). Probabilistic
basis for 2000 SAC FEMA steel moment frame guidelines. J. Struct. Eng. 128(4), 526-533.
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from quakefolio.core.lazy import lazy_module

special = lazy_module("scipy.special")  # imported on first use (core/lazy.py)

__all__ = ["piece_sums", "log_ndtr_diff", "PHI_PER_LEVEL"]

#: :math:`\Phi` evaluations the exact integral needs per (curve, damage state, level):
#: 2m per curve and state (two per segment, one per tail piece), see the module notes.
PHI_PER_LEVEL = 2

#: Largest :math:`\ln C_p` evaluated as a plain product (module notes); above it, log space.
LOG_COEF_MAX = 600.0

#: Share of a rate below which leading segment pieces are left out (module notes, Negligible pieces):
#: 2**-60, about 8.7e-19, far below the last bit of a double.
NEGLIGIBLE = 2.0 ** -60

#: Values (damage state x piece x row) per block: the work arrays of a block (about 1 MB)
#: stay in cache (measured on the benchmark's case, interleaved on a loaded machine: 2**13
#: to 2**15 equally fast within the noise, 2**16 a quarter and 2**11 a third slower).
BLOCK_VALUES = 1 << 14


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


def piece_sums(lnx, lam, ln_theta, beta, *, truncate=False, ends=False, workers=1,
               block_values=BLOCK_VALUES):
    r"""Telescoped risk integral of curves with positive rates, per (row, damage state) [1/yr].

    Parameters
    ----------
    lnx, lam : ndarray, shape (n, m)
        Log levels [ln IM units] and strictly positive rates [1/yr] of validated curves.
    ln_theta, beta : ndarray, shape (n_ds,) or (n, n_ds)
        Log medians [ln IM units] and dispersions [-], per state or per row and state.
    truncate : bool
        Truncated tail policy (module notes) instead of extrapolated tails.
    ends : bool
        Also return :math:`\Phi(z_0)` and :math:`\Phi(z_{m-1})` (two more evaluations per
        row and state).
    workers : int
        Threads over contiguous chunks of rows (numpy and scipy release the GIL in their
        loops); results do not depend on it.
    block_values : int
        State x row x piece values per block (results do not depend on it).

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
    if n == 0:
        empty = np.zeros((0, n_ds))
        return (empty,) * 3 + ((empty, empty) if ends else (None, None))
    per_row = ln_theta.ndim > 1
    shared_rows = not per_row and _same_rows(lnx)
    curves = _Curves(lnx, lam, truncate, shared_rows)
    keep = _kept_pieces(lnx[0], lam, ln_theta, beta) if shared_rows else np.ones((n_ds, m + 1), dtype=bool)
    pieces = _Pieces(keep)
    step = max(1, block_values // pieces.count)  # rows per block
    n_blocks = -(-n // step)
    workers = max(1, min(int(workers), n_blocks))
    th = _blocked_rows(ln_theta.T, step, n_blocks, 0.0) if per_row else ln_theta[:, None, None]
    b = _blocked_rows(beta.T, step, n_blocks, 1.0) if per_row else beta[:, None, None]
    reach = (max(float(lnx.max()) - float(ln_theta.min()), 0.0), float(beta.max()))  # for _coef_bound
    shared = None  # the z bounds of every row, where the rows share their levels and fragilities
    if shared_rows:
        shared = _Bounds(n_ds, m, step, pieces)
        xa = np.concatenate([lnx[0, :1], lnx[0]])
        shared.fill(np.broadcast_to(xa[:, None], (m + 1, step)), th, b)
    out = np.empty((5 if ends else 3, n_ds, n_blocks * step))
    per_thread = -(-n_blocks // workers)

    def run(first):
        work = _Work(n_ds, m, step, shared, truncate, pieces)
        for i in range(first, min(first + per_thread, n_blocks)):
            r0, r1 = i * step, min(i * step + step, n)
            th_i, b_i = (th[:, i], b[:, i]) if per_row else (th, b)
            with np.errstate(divide="ignore", over="ignore", invalid="ignore"):  # ln C above the range: log space
                work.rows(curves, r0, r1, th_i, b_i)
                checked = _coef_bound(work, r1 - r0, reach) > LOG_COEF_MAX  # else no piece needs log space
                _piece_block(work, pieces.per_piece(b_i), out[:, :, r0:r0 + step], checked)

    starts = range(0, n_blocks, per_thread)
    if workers == 1:
        for first in starts:
            run(first)
    else:
        with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="quakefolio-risk") as pool:
            list(pool.map(run, starts))
    parts = tuple(o[:, :n].T for o in out)
    return parts if ends else parts + (None, None)


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
        lower = 0.5 * (lam[:, 1:] @ rise.T)  # (n, n_ds): a lower bound of each rate
        share = np.min(lower / lam.max(axis=1)[:, None], axis=0)  # (n_ds,)
    share = np.where(np.isfinite(share) & (share > 0), share, 0.0)
    below = (phi <= NEGLIGIBLE * share[:, None]) & (share[:, None] > 0)  # levels with negligible pieces beneath
    first = np.sum(np.cumprod(below, axis=1), axis=1)  # the pieces 1 .. first-1 are left out
    for s in range(n_ds):
        keep[s, 1:max(int(first[s]), 1)] = False
    return keep


class _Pieces:
    """The pieces evaluated, as one axis of ``count`` (damage state, piece) pairs, grouped by state.

    Each state's pieces come in order: the lower tail, the kept segments, the upper tail.
    ``full`` where every piece is kept (the axis is then the state x piece grid, reshaped).
    """

    def __init__(self, keep):
        self.n_ds, self.m1 = keep.shape
        self.state, self.piece = np.nonzero(keep)
        self.count = len(self.piece)
        self.full = bool(keep.all())
        sizes = keep.sum(axis=1)
        self.first = np.concatenate([[0], np.cumsum(sizes)[:-1]])  # the lower-tail piece of each state
        self.last = self.first + sizes - 1  # the upper-tail piece of each state

    def take(self, grid):
        """Values on the state x piece grid (n_ds, m + 1, rows) as (count, rows)."""
        if self.full:
            return grid.reshape(self.count, grid.shape[-1])
        return grid[self.state, self.piece]

    def per_piece(self, b):
        """Per-state values ``b`` (n_ds, 1, rows or 1) as (count, rows or 1)."""
        return b[self.state, 0]


def _same_rows(lnx):
    """Whether every row of ``lnx`` (n, m) holds the same levels (a broadcast row is seen without a comparison)."""
    if len(lnx) < 2 or lnx.strides[0] == 0:
        return True
    return bool(np.array_equal(lnx[1:], np.broadcast_to(lnx[:1], (len(lnx) - 1, lnx.shape[1]))))


def _coef_bound(work, nb, reach):
    r"""An upper bound of :math:`\ln C_p` over the ``nb`` rows of a block, every piece and state.

    :math:`\ln C_p = \ln\lambda_a + k_p(\ln x_a - \ln\theta) + (k_p\beta)^2/2 \le
    \max\ln\lambda + K\max(0, \max\ln x - \min\ln\theta) + (K \max\beta)^2/2` with
    :math:`K = \max k_p \ge 0`, plus a margin of 1 for round-off; ``reach`` holds the
    first bracket and :math:`\max\beta` of the call.
    """
    k = work.kp[1:-1, :nb]
    big_k = float(k.max(initial=0.0))
    if not np.isfinite(big_k):
        return np.inf
    big_k = max(big_k, 0.0)
    return float(work.la[1:, :nb].max()) + big_k * reach[0] + 0.5 * (big_k * reach[1]) ** 2 + 1.0


class _Curves:
    """The rows' log levels and rates; each thread takes the logs and slopes of its blocks (:meth:`_Work.rows`).

    ``dx`` holds the level steps of every row where the rows share their levels, else None.
    """

    def __init__(self, lnx, lam, truncate, shared):
        self.lnx, self.lam, self.truncate = lnx, lam, truncate
        self.dx = np.subtract(lnx[0, 1:], lnx[0, :-1]) if shared else None


def _blocked_rows(a, step, n_blocks, fill):
    """Per-row values ``a`` (n_ds, n) as (n_ds, n_blocks, 1, step), padded with ``fill``."""
    out = np.full((a.shape[0], n_blocks * step), fill)
    out[:, :a.shape[1]] = a
    return out.reshape(a.shape[0], n_blocks, 1, step)


class _Bounds:
    """Per evaluated piece and row: z at the anchor, lower and upper bound; per state and row Phi(z_0), Phi(z_{m-1})."""

    def __init__(self, n_ds, m, rows, pieces):
        self.grid = np.empty((3, n_ds, m + 1, rows))
        self.pieces = pieces
        self.za = self.zlo = self.zhi = None
        self.p0, self.pn = np.empty((2, n_ds, rows))

    def fill(self, xa, th, b):
        """Bounds of a block of rows with log anchor levels ``xa`` (m + 1, rows), ``th, b`` (n_ds, 1, rows or 1)."""
        za, zlo, zhi = self.grid
        np.subtract(xa, th, out=za)
        za /= b  # z = (ln x - ln theta) / beta
        zlo[:, 1:] = za[:, 1:]
        zlo[:, 0] = -np.inf  # bounds: -inf, z_0 .. z_{m-1}, +inf
        zhi[:, :-1] = za[:, 1:]
        zhi[:, -1] = np.inf
        special.ndtr(za[:, 0], out=self.p0)
        special.ndtr(za[:, -1], out=self.pn)
        self.za, self.zlo, self.zhi = (self.pieces.take(g) for g in self.grid)


class _Work:
    """Preallocated work arrays of one thread: per evaluated piece (:class:`_Pieces`), a block's rows.

    Pieces major, so that every ufunc runs over a whole block; a block's rows are copied in
    transposed (a block is small, the copy stays in cache).  A last block shorter than
    the others leaves earlier (finite) values in its padding, never read.
    """

    def __init__(self, n_ds, m, rows, shared, truncate, pieces):
        self.pieces = pieces
        self.kb, self.lo, self.hi, self.c = np.empty((4, pieces.count, rows))
        self.t = np.empty((pieces.count, rows), dtype=np.int64)
        self.kp, self.la, self.xa = np.zeros((3, m + 1, rows))  # slope, log rate, log level at the anchor
        self.ln_lam, self.k = np.empty((2, rows, m))  # a block's log rates and slopes, rows major
        if truncate:
            self.kp[0] = 0.0  # the lower piece is lambda_0 Phi(z_0)
            self.la[-1] = -np.inf  # no upper piece
        self.bounds = shared if shared is not None else _Bounds(n_ds, m, rows, pieces)
        self.shared = shared is not None

    def rows(self, curves, r0, r1, th, b):
        """Take rows ``r0:r1`` of ``curves`` (and their bounds against ``th, b`` unless shared)."""
        nb, m = r1 - r0, curves.lam.shape[1]
        kp, la, xa = self.kp[:, :nb], self.la[:, :nb], self.xa[:, :nb]
        ln_lam, k = self.ln_lam[:nb], self.k[:nb, :-1]
        np.log(curves.lam[r0:r1], out=ln_lam)
        np.subtract(ln_lam[:, :-1], ln_lam[:, 1:], out=k)  # k of segment i: -d ln(lambda) / d ln(x)
        k /= curves.dx if curves.dx is not None else np.subtract(curves.lnx[r0:r1, 1:], curves.lnx[r0:r1, :-1])
        kp[1:-1] = k.T  # pieces: lower tail, segments, upper tail
        kp[-1] = kp[-2]
        la[1:-1] = ln_lam[:, :-1].T
        la[0] = la[1]
        if not curves.truncate:
            kp[0] = kp[1]
            la[-1] = ln_lam[:, m - 1]
        if not self.shared:
            xa[1:] = curves.lnx[r0:r1].T
            xa[0] = xa[1]
            self.bounds.fill(self.xa, th, b)

    def take(self):
        bd = self.bounds
        return self.kp, self.la, self.kb, self.lo, self.hi, self.c, self.t, bd.za, bd.zlo, bd.zhi, bd.p0, bd.pn


#: The sign bit of a double, as an int64.
_SIGN = np.int64(np.iinfo(np.int64).min)


def _piece_block(work, b, out, checked=True):
    """Pieces of one block of rows (module notes); writes inner, low, high (and p0, pn) into ``out``.

    ``b`` holds the dispersion of each evaluated piece (count, 1 or rows).  The segment
    pieces are added in order (p = 1, 2, ..), so each row's sum is the same whatever the
    block (``tests/test_kernels.py`` checks it bit for bit).
    """
    kp, la, kb, lo, hi, c, t, za, zlo, zhi, p0, pn = work.take()
    pieces = work.pieces
    np.take(kp, pieces.piece, axis=0, out=kb)
    kb *= b  # k beta
    # ln C = ln lambda_a + k beta (z_a + k beta / 2)
    np.multiply(kb, 0.5, out=c)
    c += za
    c *= kb
    np.take(la, pieces.piece, axis=0, out=lo)
    c += lo
    np.add(zlo, kb, out=lo)
    np.add(zhi, kb, out=hi)
    big = _log_space_terms(c, lo, hi) if checked else None
    # sigma = -sign(lo) on the bits: sigma lo = -|lo|, sigma hi = -hi where lo >= 0
    lo_bits, hi_bits = lo.view(np.int64), hi.view(np.int64)
    np.bitwise_and(lo_bits, _SIGN, out=t)
    np.bitwise_xor(hi_bits, t, out=hi_bits)
    np.bitwise_xor(hi_bits, _SIGN, out=hi_bits)
    np.bitwise_or(lo_bits, _SIGN, out=lo_bits)
    special.ndtr(lo, out=lo)
    special.ndtr(hi, out=hi)
    hi -= lo
    np.abs(hi, out=hi)  # sigma [Phi(sigma hi) - Phi(sigma lo)] >= 0
    np.exp(c, out=c)
    c *= hi
    if big is not None:
        c[big[0]] = big[1]
    for s in range(pieces.n_ds):  # each state's segment pieces, in order
        segments, inner = c[pieces.first[s] + 1:pieces.last[s]], out[0, s]
        if c.shape[-1] > 1:  # the pieces axis is not the inner one: numpy adds in order
            np.add.reduce(segments, axis=0, out=inner)
        else:  # one row: numpy would sum the pieces pairwise; add them in order as for several rows
            inner[...] = 0.0 if not len(segments) else segments[0]
            for p in range(1, len(segments)):
                inner += segments[p]
    out[1] = c[pieces.first]
    out[2] = c[pieces.last]
    if len(out) > 3:
        out[3], out[4] = p0, pn


def _log_space_terms(c, lo, hi):
    """Where ln C exceeds :data:`LOG_COEF_MAX`: (index, exp(ln C + ln(Phi(hi) - Phi(lo)))), or None."""
    if not c.max(initial=-np.inf) > LOG_COEF_MAX:
        return None
    idx = np.nonzero(c > LOG_COEF_MAX)
    with np.errstate(over="ignore"):
        return idx, np.exp(c[idx] + log_ndtr_diff(lo[idx], hi[idx]))
