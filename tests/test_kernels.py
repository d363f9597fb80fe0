"""The numerical kernels' shortcuts change no bit, and the benchmark's reference agrees with the kernel.

* Risk convolution (:mod:`quakefolio.core.risk`, :mod:`quakefolio.core.risk_pieces`,
  :mod:`quakefolio.core.risk_loops`): the compiled normal CDF is scipy's, bit for bit; results
  do not depend on the row blocking, the split of rows between calls or the number of threads,
  bit for bit; the telescoped and the per-segment forms agree to round-off (tails,
  diagnostics, log-space terms); the segment pieces left out as negligible change no rate by
  more than their bound.
* Hazard engine (:mod:`quakefolio.core.hazard`): evaluating the truncated exceedance only
  inside :func:`truncation_window` gives exactly the full formula; the curves do not depend
  on the pass size, bit for bit.
* ``benchmarks/reference_risk.py`` (the tight plain-numpy version of the same integral,
  telescoped closed form, Cornell et al. 2002 Eq. 11 per piece) agrees with
  :func:`damage_state_rates` to 1e-12 relative.
No timing here: speed is measured by ``benchmarks/`` only.
"""
import importlib.util

import numpy as np
import pytest
from scipy.special import ndtr

from conftest import REPO
from quakefolio.core.hazard import exceedance_probability, hazard_from_pairs, truncation_window
from quakefolio.core.risk import _convolve, damage_state_rates, risk_disaggregation
import quakefolio.core.risk_loops as risk_loops
import quakefolio.core.risk_pieces as risk_pieces
from quakefolio.core.risk_pieces import piece_sums


def _reference_module():
    spec = importlib.util.spec_from_file_location("reference_risk", REPO / "benchmarks" / "reference_risk.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _curves(rng, n, m=40, zero_tail=False):
    """Curved hazard curves on a shared level grid (invented), optionally ending at zero rates."""
    levels = np.geomspace(5e-4, 4.0, m)
    lnx = np.log(levels / rng.uniform(0.3, 3.0, (n, 1)))
    rates = np.minimum.accumulate(np.minimum(np.exp(-4.6 - 1.6 * lnx - 0.12 * lnx ** 2), 0.5), axis=1)
    if zero_tail:
        rates[np.arange(m) >= rng.integers(2, m + 1, n)[:, None]] = 0.0
    return levels, rates


def test_reference_agrees_with_the_kernel():
    # Two evaluations of the exact integral telescoped into positive terms: plain products
    # C_p [Phi(hi) - Phi(lo)] added in order (kernel) and log-space terms summed pairwise
    # (reference); only round-off differs.
    rng = np.random.default_rng(7)
    levels, rates = _curves(rng, 60)
    ref = _reference_module()
    for medians, betas in [([0.1, 0.3, 0.9, 2.5], [0.6] * 4), ([0.05, 0.4, 1.5, 4.0], [0.3, 0.5, 0.8, 1.2])]:
        got = damage_state_rates(levels, rates, np.array(medians), np.array(betas))
        expected = ref.damage_state_rates_reference(levels, rates, np.array(medians), np.array(betas))
        np.testing.assert_allclose(got, expected, rtol=1e-12, atol=0)


@pytest.mark.parametrize("zero_tail", [False, True])
def test_risk_results_do_not_depend_on_blocking(zero_tail):
    rng = np.random.default_rng(11)
    levels, rates = _curves(rng, 37, m=23, zero_tail=zero_tail)
    lnx = np.log(np.broadcast_to(levels, rates.shape))
    ln_theta, beta = np.log([0.08, 0.3, 1.1]), np.array([0.35, 0.6, 0.9])
    whole = _convolve(lnx, rates, ln_theta, beta, segments=True)
    for block in (1, 70, 500):
        parts = _convolve(lnx, rates, ln_theta, beta, segments=True, block_values=block)
        for a, b in zip(whole, parts):
            assert np.array_equal(a, b)
    # the sum over segments is the sum of the same per-segment values
    shares = risk_disaggregation(levels, rates, np.exp(ln_theta), beta)
    assert shares.shape == (37, 3, 24)


@pytest.mark.parametrize("n", [0.5, 1.0, 2.0, 3.0, 4.5, 6.0, 8.0, 40.0])
def test_truncation_window_changes_no_bit(n):
    # Outside the window the clipped value is exactly 0 or 1; inside, Phi is evaluated as
    # in the full formula clip((Phi(z) - Phi(-n)) / (1 - 2 Phi(-n)), 0, 1).
    lo, hi = truncation_window(n)
    edges = [e for e in (lo, hi, -n, n) if np.isfinite(e)]
    z = np.concatenate([e + np.linspace(-1e-5, 1e-5, 4001) for e in edges] + [np.linspace(-60, 60, 4001)])
    mu, sd = z * 0.7, np.full(z.size, 0.7)
    full = ndtr((mu[:, None] - np.zeros(1)) * (1.0 / sd[:, None]))
    pn = ndtr(-n)
    full -= pn
    full *= 1.0 / (1.0 - 2.0 * pn)
    np.clip(full, 0.0, 1.0, out=full)
    got = exceedance_probability(np.zeros(1), mu, sd, n)
    assert np.array_equal(got, full)


def test_hazard_curves_do_not_depend_on_the_pass_size():
    rng = np.random.default_rng(3)
    counts = rng.integers(1, 400, 25)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    n_pairs = int(counts.sum())
    mu, sd = rng.uniform(-7, 0, n_pairs), rng.uniform(0.0, 0.8, n_pairs)
    rate = rng.uniform(1e-5, 1e-3, n_pairs)
    lnx = np.log(np.geomspace(1e-3, 3.0, 30))
    owners = np.arange(25) * 2
    for trunc in (None, 3.0):
        whole = hazard_from_pairs(lnx, mu, sd, rate, starts, owners, 50, trunc, chunk=n_pairs)
        for chunk in (1, 150, 1000):
            assert np.array_equal(hazard_from_pairs(lnx, mu, sd, rate, starts, owners, 50, trunc, chunk=chunk), whole)


def _mixed_case(rng, n=45, m=17):
    """Curves of every kind the kernels route: positive, ending at zero rates, steep (log-space terms)."""
    levels, rates = _curves(rng, n, m=m)
    _, ending = _curves(rng, n, m=m, zero_tail=True)
    rates[::3] = ending[::3]  # every third curve reaches a zero rate
    # a drop with slope k = 120 between levels 8 and 9: ln C_p far above 600 there
    rates[1, 9:] = rates[1, 9:] * np.exp(-120.0 * (np.log(levels[9]) - np.log(levels[8])))
    return levels, rates


@pytest.mark.parametrize("per_row", [False, True])
def test_telescoped_sums_do_not_depend_on_row_splits_or_threads(per_row):
    # Each row's pieces are added in order by the row's own loop, whichever call or thread
    # takes the row: splitting the rows between calls or threads changes no bit.
    rng = np.random.default_rng(5)
    n = 203
    levels, rates = _curves(rng, n, m=19)
    lnx = np.log(levels * rng.uniform(0.9, 1.1, (n, 1)))  # levels differing per row
    ln_theta, beta = np.log([0.08, 0.3, 1.1]), np.array([0.35, 0.6, 0.9])
    if per_row:
        ln_theta = ln_theta + rng.uniform(-0.5, 0.5, (n, 3))
        beta = beta * rng.uniform(0.8, 1.2, (n, 3))
    for truncate, ends in [(False, False), (True, False), (False, True)]:
        whole = piece_sums(lnx, rates, ln_theta, beta, truncate=truncate, ends=ends)
        for workers in (2, 3, 7):
            parts = piece_sums(lnx, rates, ln_theta, beta, truncate=truncate, ends=ends, workers=workers)
            for a, b in zip(whole, parts):
                assert (a is None and b is None) or np.array_equal(a, b)
        for cut in (1, 50, 202):
            rows = (slice(0, cut), slice(cut, n))
            split = [piece_sums(lnx[r], rates[r], ln_theta[r] if per_row else ln_theta,
                                beta[r] if per_row else beta, truncate=truncate, ends=ends) for r in rows]
            for i, a in enumerate(whole):
                assert (a is None) or np.array_equal(a, np.concatenate([part[i] for part in split]))


def test_compiled_normal_cdf_is_scipys_bit_for_bit():
    # core/risk_loops.py evaluates Phi(x) for x <= 0 as erfc(-x / sqrt 2) / 2 through scipy's own erfc,
    # the expression scipy's ndtr evaluates there (Cephes ndtr), and calls ndtr itself above 0: every
    # value must be scipy.special.ndtr's, bit for bit, over the whole range (tails, zero, infinities).
    import numba

    @numba.njit
    def cdf_all(phi, erfc, x, out):
        for i in range(x.size):
            out[i] = risk_loops.cdf(phi, erfc, x[i])

    rng = np.random.default_rng(17)
    grid = np.geomspace(1e-300, 40.0, 40001)
    x = np.concatenate([-grid, grid, [-np.inf, -0.0, 0.0, np.inf, -1.0, 1.0, -np.sqrt(0.5), np.sqrt(0.5)],
                        rng.standard_normal(200_000) * 6.0, rng.uniform(-1.5, 1.5, 200_000)])
    got = np.empty_like(x)
    cdf_all(risk_loops.PHI, risk_loops.ERFC, x, got)
    assert np.array_equal(got, ndtr(x))


@pytest.mark.parametrize("tail", ["extrapolate", "truncate"])
def test_telescoped_and_per_segment_forms_agree(tail):
    # The same closed form (Cornell et al. 2002, Eq. 11 per piece) summed two ways: telescoped
    # into positive terms (curves with positive rates) and per segment (_convolve, every curve);
    # they differ by round-off only, tails and diagnostics included.  Curve 1 is steep enough for
    # the log-space terms (ln C_p above LOG_COEF_MAX).
    rng = np.random.default_rng(9)
    levels, rates = _mixed_case(rng)
    medians, betas = np.array([0.05, 0.4, 1.5, 4.0]), np.array([0.3, 0.5, 0.8, 1.2])
    got, below, above = damage_state_rates(levels, rates, medians, betas, tail=tail, diagnostics=True)
    lnx = np.log(np.broadcast_to(levels, rates.shape))
    inner, low, high_ext, high_trunc = _convolve(lnx, rates, np.log(medians), betas)
    total = inner + low + high_ext
    expected = total if tail == "extrapolate" else inner + high_trunc
    np.testing.assert_allclose(got, expected, rtol=1e-13, atol=0)
    np.testing.assert_allclose(below, np.where(total > 0, low / total, 0.0), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(above, np.where(total > 0, high_ext / total, 0.0), rtol=1e-12, atol=1e-15)
    assert np.array_equal(got, damage_state_rates(levels, rates, medians, betas, tail=tail, workers=2))
    assert np.all(got[1] > 0) and np.all(np.isfinite(got))
    none = damage_state_rates(levels, rates[:0], medians, betas, tail=tail, diagnostics=True)
    assert [a.shape for a in none] == [(0, 4)] * 3


def test_negligible_pieces_left_out_stay_within_their_bound(monkeypatch):
    # A level grid reaching far below the fragility (5e-4 g against medians of 0.3 g and more):
    # the leading segment pieces are left out (module notes of core/risk_pieces.py, Negligible
    # pieces).  Against every piece evaluated (NEGLIGIBLE = 0 leaves none out), each rate moves by
    # at most that share plus round-off, and what was left out is below its bound piece by piece.
    rng = np.random.default_rng(13)
    levels, rates = _curves(rng, 300)
    lnx = np.broadcast_to(np.log(levels), rates.shape)
    ln_theta, beta = np.log([0.3, 0.9, 1.6, 2.5]), np.array([0.6, 0.5, 0.4, 0.3])
    keep = risk_pieces._kept_pieces(lnx[0], rates, ln_theta, beta)
    left_out = (~keep).sum(axis=1)
    assert keep[:, 0].all() and keep[:, -1].all() and left_out.min() >= 3 and left_out.sum() >= 40  # of 156
    assert np.all(np.diff(left_out) >= 0)  # the higher the median, the more pieces lie far below it
    got = piece_sums(lnx, rates, ln_theta, beta, ends=True)
    monkeypatch.setattr(risk_pieces, "NEGLIGIBLE", 0.0)
    assert risk_pieces._kept_pieces(lnx[0], rates, ln_theta, beta).all()
    every = piece_sums(lnx, rates, ln_theta, beta, ends=True)
    for a, b in zip(got[1:], every[1:]):  # the tails and the diagnostics are evaluated in both
        assert np.array_equal(a, b)
    total = every[0] + every[1] + every[2]
    moved = np.abs((got[0] + got[1] + got[2]) - total) / total
    assert moved.max() <= 2.0 ** -60 + 4e-16, moved.max()
    # the pieces left out, each evaluated on its own by the per-segment form (_convolve), against the bound
    for s in range(4):
        first = int(np.argmax(keep[s, 1:])) + 1  # the first segment piece kept
        seg = _convolve(lnx[:, :first], rates[:, :first], ln_theta[s:s + 1], beta[s:s + 1], tails=False)[0][:, 0]
        assert np.all(seg <= 2.0 ** -60 * total[:, s]), (s, np.max(seg / total[:, s]))
