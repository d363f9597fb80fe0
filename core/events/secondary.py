r"""Correlated secondary uncertainty: damage states and loss ratios shared within a group per event.

Model
-----
In the sampled loss model each asset :math:`i` in event :math:`e` draws a damage state from
a uniform :math:`u_{ie}` (inverse CDF over the ordered states,
:func:`quakefolio.core.events.portfolio.sample_loss_ratio`) and, given a damaged state
:math:`j` with a random loss ratio, a loss ratio from :math:`\mathrm{Beta}(a_j, b_j)`.  With
independent draws, 100 buildings of one class at one site average their secondary
uncertainty away and the portfolio tail is as thin as with mean damage ratios.  Here part
of that uncertainty is shared by every asset of a *group* (the building class by default,
or an exposure column) in each event, through a one-factor Gaussian copula:

.. math::

    Z^{D}_{ie} = \sqrt{\rho}\, X^{D}_{g(i)e} + \sqrt{1-\rho}\, \varepsilon^{D}_{ie}, \qquad
    u_{ie} = \Phi(Z^{D}_{ie}),

    Z^{L}_{ie} = \sqrt{\rho}\, X^{L}_{g(i)e} + \sqrt{1-\rho}\, \varepsilon^{L}_{ie}, \qquad
    v_{ie} = \Phi(Z^{L}_{ie}), \qquad
    \mathrm{LR}_{ie} = F^{-1}_{\mathrm{Beta}(a_j, b_j)}(v_{ie}),

with :math:`X^{D}, X^{L}, \varepsilon^{D}, \varepsilon^{L}` independent standard normals:
one pair of group factors per (group, event), one pair of own terms per (asset, event).
Each :math:`u_{ie}` and :math:`v_{ie}` is still :math:`U(0, 1)`, so every asset's damage-state
probabilities and loss-ratio distribution, hence every asset's mean loss and the portfolio
AAL, are those of the independent model for any :math:`\rho`; only the dependence between
assets of one group changes.  Two assets of one group have normal scores with correlation
:math:`\rho` (the one-factor Gaussian copula; Li 2000; Vasicek 2002), so

.. math::

    P(DS_i \ge j, DS_k \ge l) = \Phi_2\!\left(\Phi^{-1}(P^*_j(x_i)), \Phi^{-1}(P^*_l(x_k)); \rho\right)

with :math:`\Phi_2` the bivariate standard normal CDF (the pairwise exceedance used by the
variance check in the tests).  Assets of different groups stay conditionally independent
given the ground motion.  The damage-state factor and the loss-ratio factor of a group are
independent of each other, as the damage-state and loss-ratio draws of one asset are.

Limits
------
* :math:`\rho = 0`: the independence copula.  The damage-state uniforms *are* the own
  uniforms and the loss ratios are drawn by numpy's beta sampler from the same generator in
  the same order as :func:`~quakefolio.core.events.portfolio.sample_loss_ratio`: the draws
  are bit for bit those of independent sampling.
* :math:`0 < \rho < 1`: the own uniforms are mapped to normal scores
  (:math:`\varepsilon = \Phi^{-1}(u^{own})`), and loss ratios come from the beta inverse CDF
  (``scipy.special.betaincinv``) at the correlated uniform; the loss-ratio own uniforms are
  drawn after the damage-state uniforms, one per asset-event (used where the drawn state has
  a random loss ratio).  The same model as :math:`\rho = 0` in distribution, not in draws.
* :math:`\rho = 1`: :math:`u_{ie} = \Phi(X^{D}_{g(i)e})` for every asset of the group, so
  damage states and loss-ratio quantiles are comonotonic within a group (the Frechet upper
  bound of the group's dependence).

The correlation is a modelling assumption: the default of the configuration
(``[portfolio] secondary_correlation``) is this project's assumption, not a published
calibration.

The independent twin
--------------------
The correlation's effect on PML and TVaR (:func:`correlation_effect`) is measured against
independent draws on the same ground motions.  The twin (``twin=True`` in
:func:`sample_correlated_loss_ratio`) takes the *same* own uniforms
:math:`u^{own}, v^{own}` as the correlated draws and leaves the group factors out
(:math:`\rho = 0` in the copula): the independent model exactly, in distribution, on
common random numbers, so the paired difference holds only the group factors' effect
and its sampling noise is far below that of two unrelated simulations (common random
numbers, a standard variance-reduction technique: Glasserman 2003, Monte Carlo Methods in
Financial Engineering, Springer, chapter 4 - chapter from memory).

Random streams
--------------
The own terms come from the damage stream of each (event block, class entry)
(:func:`quakefolio.core.events.eventset.damage_block_rng`), the group factors from a stream
of their own per (event block, group) (:func:`quakefolio.core.events.eventset.group_factor_rng`):
both are per event block, so results do not depend on how blocks are grouped into tasks,
and adding a group (the what-if's new classes) leaves every other group's factors unchanged.

References
----------
Li, D. X. (2000). On default correlation: a copula function approach. Journal of Fixed
Income 9(4), 43-54.
Vasicek, O. (2002). The distribution of loan portfolio value. Risk 15(12), 160-162.
"""
from __future__ import annotations

import numbers

import numpy as np

from quakefolio.core.lazy import lazy_module
from quakefolio.core.events.eventset import group_factor_rng
from quakefolio.core.events.portfolio import _state_draw, _state_terms, aal_with_standard_error, ep_from_years, tvar
from quakefolio.core.loss import beta_parameters
from quakefolio.core.whatif import change, paired_aal_change

special = lazy_module("scipy.special")

__all__ = ["check_correlation", "correlated_uniform", "group_factors", "sample_correlated_loss_ratio",
           "correlation_effect"]


def check_correlation(rho) -> float:
    """Return ``rho`` as a float after checking it is a real number in [0, 1].

    Raises
    ------
    ValueError
        If ``rho`` is not a real number (bools are refused) or lies outside [0, 1].
    """
    if isinstance(rho, (bool, np.bool_)) or not isinstance(rho, numbers.Real) or not 0.0 <= float(rho) <= 1.0:
        raise ValueError(f"rho must be a correlation coefficient in [0, 1]; got {rho!r}")
    return float(rho)


def correlated_uniform(u_own, z_group, rho):
    r"""Uniforms of the one-factor Gaussian copula: :math:`\Phi(\sqrt\rho\, z + \sqrt{1-\rho}\,\Phi^{-1}(u))`.

    Parameters
    ----------
    u_own : array_like [-]
        Own uniforms in [0, 1).
    z_group : array_like, broadcastable to ``u_own`` [-]
        Standard-normal group factors.
    rho : float
        Correlation of the normal scores within a group, in [0, 1].

    Returns
    -------
    ndarray [-]
        Uniforms in [0, 1]; ``u_own`` itself (same values) for :math:`\rho = 0`,
        :math:`\Phi(z)` (broadcast) for :math:`\rho = 1`.
    """
    rho = check_correlation(rho)
    u = np.asarray(u_own, dtype=float)
    if rho == 0.0:
        return u
    z = np.asarray(z_group, dtype=float)
    if rho == 1.0:
        return np.broadcast_to(special.ndtr(z), np.broadcast_shapes(u.shape, z.shape)).copy()
    return special.ndtr(np.sqrt(rho) * z + np.sqrt(1.0 - rho) * special.ndtri(u))


def group_factors(seed, blocks, n_groups):
    r"""Standard-normal group factors of a chunk of events: damage state and loss ratio.

    Parameters
    ----------
    seed : int
        The run's seed.
    blocks : sequence of (block index, first row, stop row)
        The chunk's random-number blocks and their rows (consecutive, from row 0).
    n_groups : int
        Number of groups.

    Returns
    -------
    ndarray, shape (n_events, n_groups, 2) [-]
        ``[..., 0]`` the damage-state factor :math:`X^D`, ``[..., 1]`` the loss-ratio factor
        :math:`X^L`; block ``b`` and group ``g`` from
        :func:`~quakefolio.core.events.eventset.group_factor_rng` (``standard_normal((n, 2))``).
    """
    n_ev = max((hi for _, _, hi in blocks), default=0)
    out = np.empty((n_ev, int(n_groups), 2))
    for b, lo, hi in blocks:
        for g in range(int(n_groups)):
            out[lo:hi, g] = group_factor_rng(seed, b, g).standard_normal((hi - lo, 2))
    return out


def sample_correlated_loss_ratio(rng, im, medians, betas, mean_damage_ratio, cov, z_damage, z_ratio, rho, twin=False):
    r"""Damage state and loss ratio [-] per asset-event with group-correlated secondary uncertainty.

    Parameters
    ----------
    rng : numpy.random.Generator
        The own terms' generator (one per event block and class entry).
    im : array_like, shape S [IM units], non-negative
    medians, betas, mean_damage_ratio, cov : array_like, shape (n_ds,)
        As :func:`quakefolio.core.events.portfolio.sample_loss_ratio`.
    z_damage, z_ratio : array_like, broadcastable to S [-]
        Group factors :math:`X^D`, :math:`X^L` of each asset-event (:func:`group_factors`);
        unused when ``rho`` is 0.
    rho : float
        Within-group correlation of the normal scores, in [0, 1].
    twin : bool
        True: the independent twin of the draws with ``rho`` (module notes): the same own
        uniforms, the group factors left out.  Needs ``rho > 0``.

    Returns
    -------
    damage_state : ndarray of int, shape S
        0 for no damage, ``j`` for damage state ``j``.
    loss_ratio : ndarray, shape S [-]
        0 where undamaged; the state's mean where its CoV is 0.

    Notes
    -----
    Module notes.  The generator is used in a fixed order: all own damage-state uniforms
    (shape S), then either, for the asset-events with a random loss ratio in C order, one
    beta variate each (:math:`\rho = 0`, identical to
    :func:`~quakefolio.core.events.portfolio.sample_loss_ratio`), or one own loss-ratio
    uniform per asset-event (shape S; :math:`\rho > 0` and the twin), so that the
    correlated draws and their twin use the same uniform at every asset-event.
    """
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    rho = check_correlation(rho)
    if twin and rho == 0.0:
        raise ValueError("twin=True pairs with correlated draws: it needs rho > 0")
    shared = 0.0 if twin else rho  # the twin: the same own uniforms, no group factors
    p, mdr, c = _state_terms(im, medians, betas, mean_damage_ratio, cov)
    shape = p.shape[:-1]
    u = correlated_uniform(rng.random(shape), 0.0 if shared == 0.0 else np.broadcast_to(z_damage, shape), shared)
    state, loss_ratio, mu, cv, random = _state_draw(p, mdr, c, u)
    if rho == 0.0:
        if np.any(random):
            a, b = beta_parameters(mu[random], cv[random])
            loss_ratio[random] = rng.beta(a, b)
        return state, loss_ratio
    v_own = rng.random(shape)
    if np.any(random):
        a, b = beta_parameters(mu[random], cv[random])
        z = 0.0 if shared == 0.0 else np.broadcast_to(z_ratio, shape)[random]
        loss_ratio[random] = special.betaincinv(a, b, correlated_uniform(v_own[random], z, shared))
    return state, loss_ratio


#: Batches of simulated years for the standard error of the PML and TVaR changes (batch means).
N_BATCHES = 10


def batch_change_standard_error(year_before, year_after, max_before, max_after, return_periods_yr,
                                n_batches=N_BATCHES):
    r"""Standard errors [currency] of the PML (AEP, OEP) and TVaR changes between paired simulations.

    Parameters
    ----------
    year_before, year_after : ndarray, shape (N,) [currency]
        Annual losses of the same simulated years, before and after the change.
    max_before, max_after : ndarray, shape (N,) [currency]
        Largest event loss of each year, the same two ways.
    return_periods_yr : array_like, shape (n_rp,) [yr]
    n_batches : int
        Number of batches :math:`K` >= 2 of consecutive years.

    Returns
    -------
    ndarray, shape (3 n_rp,) [currency]
        For ``aep_loss``, ``oep_loss`` and ``tvar_loss`` per return period, as
        :func:`correlation_effect` orders them; NaN where a batch holds fewer years than the
        return period (or fewer than :math:`K` years in all).

    Notes
    -----
    Batch means, a standard method of simulation output analysis (common practice): the
    :math:`N` years (independent and identically distributed) are cut into :math:`K`
    batches of :math:`\lfloor N/K 
floor` years (the remainder left out); the change
    :math:`d_k` of each metric is computed within each batch, and the standard error of the
    change over all :math:`N` years is :math:`s_d / \sqrt{K}`.  Quantile and tail estimators
    have a variance close to proportional to :math:`1/N`, so a batch's variance is
    :math:`K` times that of the whole; both simulations share the years, so the pairing
    that cancels the ground-motion noise is kept within each batch.
    """
    rps = np.asarray(return_periods_yr, dtype=float)
    k = int(n_batches)
    if k < 2:
        raise ValueError(f"n_batches must be >= 2, got {n_batches!r}")
    n = (np.asarray(year_before).size // k) * k
    if n < k:
        return np.full(3 * rps.size, np.nan)
    cut = lambda y: np.asarray(y, dtype=float)[:n].reshape(k, -1)
    d = np.concatenate([ep_from_years(cut(year_after), rps) - ep_from_years(cut(year_before), rps),
                        ep_from_years(cut(max_after), rps) - ep_from_years(cut(max_before), rps),
                        tvar(cut(year_after), rps) - tvar(cut(year_before), rps)], axis=-1)
    return np.std(d, axis=0, ddof=1) / np.sqrt(k)


def correlation_effect(year_correlated, year_independent, max_correlated, max_independent, return_periods_yr):
    r"""Portfolio metrics with correlated secondary uncertainty against independent sampling.

    Parameters
    ----------
    year_correlated, year_independent : ndarray, shape (N,) [currency]
        Annual losses of the same simulated years and ground-motion fields, with the within-group
        correlation and with independent draws.
    max_correlated, max_independent : ndarray, shape (N,) [currency]
        Largest event loss of each year, the same two ways.
    return_periods_yr : array_like, shape (n_rp,) [yr]

    Returns
    -------
    dict of ndarray, each shape (1 + 3 n_rp,)
        ``metric`` (``aal``, then ``aep_loss``, ``oep_loss``, ``tvar_loss`` per return period),
        ``return_period_yr`` (NaN for the AAL), ``value_correlated``, ``value_independent``,
        ``change``, ``relative_change`` (:func:`quakefolio.core.whatif.change`, from independent
        to correlated) and ``standard_error_of_change`` (AAL: paired years,
        :func:`quakefolio.core.whatif.paired_aal_change`; PML and TVaR: batch means of
        paired years, :func:`batch_change_standard_error`, NaN where a batch is shorter than
        the return period).

    Notes
    -----
    The AAL is the same for any correlation in expectation (module notes), so its change
    is sampling noise; both simulations share their events and ground motions, so the paired
    standard error is the one that measures that noise (common practice for paired samples).
    PML (AEP, OEP) and TVaR are :func:`quakefolio.core.events.portfolio.ep_from_years` and
    :func:`quakefolio.core.events.portfolio.tvar`.
    """
    rps = np.asarray(return_periods_yr, dtype=float)
    aal_ind, _ = aal_with_standard_error(year_independent)
    aal_cor, se = paired_aal_change(year_independent, year_correlated)
    cor = np.concatenate([[aal_cor], ep_from_years(year_correlated, rps), ep_from_years(max_correlated, rps),
                          tvar(year_correlated, rps)])
    ind = np.concatenate([[aal_ind], ep_from_years(year_independent, rps), ep_from_years(max_independent, rps),
                          tvar(year_independent, rps)])
    delta, rel = change(ind, cor)
    n = rps.size
    return {
        "metric": np.array(["aal"] + ["aep_loss"] * n + ["oep_loss"] * n + ["tvar_loss"] * n, dtype=object),
        "return_period_yr": np.concatenate([[np.nan], rps, rps, rps]),
        "value_correlated": cor, "value_independent": ind, "change": delta, "relative_change": rel,
        "standard_error_of_change": np.concatenate([[se], batch_change_standard_error(
            year_independent, year_correlated, max_independent, max_correlated, rps)]),
    }
