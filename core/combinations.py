r"""Logic-tree combinations across tectonic regions: every end branch (one source-model
branch and one ground-motion model per tectonic region), its weight and its hazard curve.

Rates of independent sources add (Cornell 1968), so the hazard of a combination is the
sum of its regions' parts.  With :math:`\lambda_{s,R}^{(m)}` the curve [1/yr] of the
ruptures of region :math:`R` of source-model branch :math:`s` under model :math:`m`, the
combination :math:`c = (s, m_{R_1}, m_{R_2}, \dots)` has

.. math:: \lambda_c = \sum_R \lambda_{s,R}^{(m_R)}, \qquad w_c = w_s \prod_R w_{R, m_R},

the product of its branch weights (the logic tree's branches are independent choices;
common practice).  Only the regions with ruptures in branch :math:`s` take part: a
region without ruptures adds nothing whatever its model, so its choice is not a branch.

Each part curve is computed once per (source branch, region, model): the *part axis*
holds the active-crustal models first, then the models of each other region present in
the source models, in :data:`quakefolio.core.gmm.TECTONIC_REGIONS` order
(:class:`PartLayout`).  A combination's curve is a gather-and-add over index arrays
(:func:`combination_curves`); its fractiles are the weighted fractiles over every
combination (:func:`combination_fractiles`, the convention of
:func:`quakefolio.core.hazard.weighted_fractiles`: the smallest value whose cumulative
weight reaches the fractile, common practice).  The weighted mean over the combinations
equals :func:`end_branch_curves` averaged with the source and active-crustal weights
(linearity of the hazard sum), which is how the mean is computed.

Above a stated number of combinations (``max_count``) the fractiles are taken on a seeded
Monte Carlo sample of ``max_count`` combinations, each drawn with probability
:math:`w_c` (the source branch by its weight, then each region's model by its weight,
independently: the product weight) and weighted equally; the sample quantile converges
to the quantile of the weighted distribution as the sample grows (Serfling 1980, Sec.
2.3, from memory).  The draws come from the stream
:data:`quakefolio.core.events.eventset.STREAM_FRACTILE_SAMPLE`.

References
----------
Cornell, C.A. (1968). Engineering seismic risk analysis. BSSA 58(5), 1583-1606.
Serfling, R.J. (1980). Approximation Theorems of Mathematical Statistics. Wiley.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from quakefolio.core.events.eventset import STREAM_FRACTILE_SAMPLE, stream_rng
from quakefolio.core.gmm.base import TECTONIC_REGIONS
from quakefolio.core.hazard import weighted_fractiles, weighted_sum

__all__ = ["PartLayout", "Combinations", "part_layout", "tree_combinations", "part_columns", "end_branch_curves",
           "combination_curves", "combination_fractiles", "FRACTILE_CHUNK_VALUES"]

#: Combination values per pass of :func:`combination_fractiles` (about 32 MB of float64).
FRACTILE_CHUNK_VALUES = 1 << 22


@dataclass(frozen=True)
class PartLayout:
    """The part axis: the models of each tectonic region, one column per (region, model).

    Attributes
    ----------
    regions : tuple of str
        ``active_crustal`` first, then the other regions, in
        :data:`quakefolio.core.gmm.TECTONIC_REGIONS` order.
    weights : tuple of ndarray
        Branch weights [-] of each region's models (each sums to 1).
    """

    regions: tuple
    weights: tuple

    @property
    def offsets(self):
        """First column of each region (int array of ``len(regions) + 1``, the last the column count)."""
        return np.cumsum([0] + [len(w) for w in self.weights])

    @property
    def n_columns(self):
        """Columns of the part axis."""
        return int(self.offsets[-1])


@dataclass(frozen=True)
class Combinations:
    """The end branches over which fractiles are taken (every combination, or a sample).

    Attributes
    ----------
    source : ndarray of int, shape (n_c,)
        Source-model branch of each combination.
    columns : ndarray of int, shape (n_c, n_regions)
        Part-axis column of each region's model; -1 where the source branch has no
        rupture of that region.
    weight : ndarray, shape (n_c,) [-]
        Product of the branch weights (every combination) or ``1 / n_c`` (a sample).
    total : int
        Combinations of the whole tree.
    sampled : bool
        Whether ``total`` exceeded the cap and the set is a seeded sample.
    """

    source: np.ndarray
    columns: np.ndarray
    weight: np.ndarray
    total: int
    sampled: bool

    def __len__(self):
        return len(self.source)


def part_layout(gmm_weights, region_weights):
    """The part axis of the active-crustal models and the other regions' models.

    Parameters
    ----------
    gmm_weights : sequence of float
        Weights [-] of the active-crustal ground-motion branches.
    region_weights : mapping of str to sequence of float
        Weights [-] of the models of each other region present (any order).

    Returns
    -------
    PartLayout
    """
    others = [r for r in TECTONIC_REGIONS[1:] if r in region_weights]
    unknown = sorted(set(region_weights) - set(others))
    if unknown:
        raise ValueError(f"unknown tectonic regions {unknown}; valid: {', '.join(TECTONIC_REGIONS[1:])}")
    weights = [np.asarray(gmm_weights, dtype=float)] + [np.asarray(region_weights[r], dtype=float) for r in others]
    return PartLayout((TECTONIC_REGIONS[0], *others), tuple(weights))


def _present(layout, regions):
    """Slots of ``layout`` whose region is among ``regions``."""
    return [j for j, r in enumerate(layout.regions) if r in regions]


def tree_combinations(source_weights, source_regions, layout, max_count, seed):
    r"""Every combination of one source branch and one model per region present, or a seeded sample.

    Parameters
    ----------
    source_weights : sequence of float
        Weights [-] of the source-model branches (summing to 1).
    source_regions : sequence of iterable of str
        The tectonic regions with ruptures in each source branch.
    layout : PartLayout
    max_count : int
        Largest number of combinations enumerated; above it, ``max_count`` are sampled.
    seed : int
        Seed of the sample (:func:`quakefolio.core.events.eventset.stream_rng`).

    Returns
    -------
    Combinations
        Enumerated source-major, then by model of each region in layout order (the first
        region's model varying slowest), weights :math:`w_s \prod_R w_{R,m_R}` multiplied
        in that order; or the sample, in draw order, weights :math:`1/n`.

    Notes
    -----
    Module notes: product weights of independent branch choices (common practice);
    sampling by weight (Serfling 1980 for the convergence of sample quantiles).
    """
    ws = np.asarray(source_weights, dtype=float)
    if max_count < 1:
        raise ValueError(f"max_count must be at least 1, got {max_count!r}")
    slots = [_present(layout, set(regions)) for regions in source_regions]
    total = sum(math.prod(len(layout.weights[j]) for j in present) for present in slots)
    if total <= max_count:
        return _every_combination(ws, slots, layout, total)
    return _sampled_combinations(ws, slots, layout, total, int(max_count), seed)


def _every_combination(ws, slots, layout, total):
    """The enumerated combinations (see :func:`tree_combinations`)."""
    offsets = layout.offsets
    sources, columns, weights = [], [], []
    for s, present in enumerate(slots):
        counts = [len(layout.weights[j]) for j in present]
        idx = np.indices(counts).reshape(len(counts), -1).T if counts else np.zeros((1, 0), dtype=np.int64)
        col = np.full((len(idx), len(layout.regions)), -1, dtype=np.int64)
        w = np.full(len(idx), ws[s])
        for k, j in enumerate(present):
            col[:, j] = offsets[j] + idx[:, k]
            w = w * layout.weights[j][idx[:, k]]
        sources.append(np.full(len(idx), s, dtype=np.int64))
        columns.append(col)
        weights.append(w)
    return Combinations(np.concatenate(sources), np.concatenate(columns), np.concatenate(weights), total, False)


def _pick(cum_weights, u):
    """Index drawn by weight from uniform numbers ``u`` (inverse CDF of the weights)."""
    return np.minimum(np.searchsorted(cum_weights / cum_weights[-1], u, side="right"), len(cum_weights) - 1)


def _sampled_combinations(ws, slots, layout, total, n, seed):
    """``n`` combinations drawn by weight, equally weighted (see :func:`tree_combinations`)."""
    u = stream_rng(seed, STREAM_FRACTILE_SAMPLE).random((n, 1 + len(layout.regions)))
    source = _pick(np.cumsum(ws), u[:, 0]).astype(np.int64)
    has = np.zeros((len(slots), len(layout.regions)), dtype=bool)
    for s, present in enumerate(slots):
        has[s, present] = True
    offsets = layout.offsets
    columns = np.full((n, len(layout.regions)), -1, dtype=np.int64)
    for j, w in enumerate(layout.weights):
        columns[:, j] = np.where(has[source, j], offsets[j] + _pick(np.cumsum(w), u[:, 1 + j]), -1)
    return Combinations(source, columns, np.full(n, 1.0 / n), total, True)


def part_columns(by_region, layout, shape):
    """One source branch's region curves laid out on the part axis.

    Parameters
    ----------
    by_region : dict of str to ndarray, shape (n_models, ...)
        :func:`quakefolio.core.hazard.compute_site_hazard` with ``by_region=True``.
    layout : PartLayout
    shape : tuple of int
        The trailing shape, e.g. (n_ims, n_sites, n_levels).

    Returns
    -------
    ndarray, shape (n_columns,) + shape [1/yr]
        Zero in the columns of regions without ruptures in the branch.
    """
    out = np.zeros((layout.n_columns,) + tuple(shape))
    offsets = layout.offsets
    for j, region in enumerate(layout.regions):
        if region in by_region:
            out[offsets[j]:offsets[j + 1]] = by_region[region]
    return out


def end_branch_curves(parts, layout):
    r"""Curves of the (source branch, active-crustal model) end branches, other regions at their mean.

    Parameters
    ----------
    parts : ndarray, shape (n_src, n_columns, ...) [1/yr]
        Part curves (:func:`part_columns` of each source branch).
    layout : PartLayout

    Returns
    -------
    ndarray, shape (n_src, n_gmm, ...) [1/yr]
        :math:`\lambda_{s,AC}^{(g)} + \sum_{R} \sum_m w_{R,m} \lambda_{s,R}^{(m)}`, added in
        layout order, each region's term by
        :func:`quakefolio.core.hazard.weighted_sum` per source branch: the sums of
        :func:`quakefolio.core.hazard.compute_site_hazard` (Cornell 1968, linearity).
        With active-crustal models only, ``parts`` itself (the same values, no copy).
    """
    if len(layout.regions) == 1:
        return parts
    offsets = layout.offsets
    n_gmm = len(layout.weights[0])
    out = np.zeros(parts.shape[:1] + (n_gmm,) + parts.shape[2:])
    out += parts[:, :n_gmm]
    for j in range(1, len(layout.regions)):
        for s in range(parts.shape[0]):
            out[s] += weighted_sum(parts[s, offsets[j]:offsets[j + 1]], layout.weights[j])[None]
    return out


def combination_curves(parts, combos):
    r"""Hazard curve of every combination: the sum of its regions' part curves.

    Parameters
    ----------
    parts : ndarray, shape (n_src, n_columns, ...) [1/yr]
    combos : Combinations

    Returns
    -------
    ndarray, shape (n_c, ...) [1/yr]
        :math:`\lambda_c = \sum_R \lambda_{s,R}^{(m_R)}` (Cornell 1968: rates of
        independent sources add), added in layout order from zero.
    """
    out = np.zeros((len(combos),) + parts.shape[2:])
    for j in range(combos.columns.shape[1]):  # the few regions; sites and levels vectorised
        col = combos.columns[:, j]
        have = col >= 0
        if have.all():
            out += parts[combos.source, col]
        elif have.any():
            out[have] += parts[combos.source[have], col[have]]
    return out


def combination_fractiles(parts, combos, quantiles, chunk_values=FRACTILE_CHUNK_VALUES):
    """Weighted fractiles of the combinations' curves, value by value.

    Parameters
    ----------
    parts : ndarray, shape (n_src, n_columns, ...) [1/yr]
    combos : Combinations
    quantiles : sequence of float
        In (0, 1) [-].
    chunk_values : int
        Combination values per pass (bounds the memory; results do not depend on it).

    Returns
    -------
    ndarray, shape (n_quantiles,) + parts.shape[2:] [1/yr]
        :func:`quakefolio.core.hazard.weighted_fractiles` over the combinations (the
        smallest value whose cumulative weight reaches the fractile; common practice).
    """
    rest = parts.shape[2:]
    flat = parts.reshape(parts.shape[:2] + (-1,))
    q = np.asarray(quantiles, dtype=float)
    out = np.empty((len(q), flat.shape[2]))
    step = max(1, int(chunk_values) // max(1, len(combos)))
    for lo in range(0, flat.shape[2], step):
        hi = min(flat.shape[2], lo + step)
        out[:, lo:hi] = weighted_fractiles(combination_curves(flat[:, :, lo:hi], combos), combos.weight, q)
    return out.reshape((len(q),) + rest)
