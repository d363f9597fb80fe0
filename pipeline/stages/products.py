"""Typed, frozen stage products: what each stage of a run returns and the next one reads.

The run is a chain of stages, each a plain function that takes the products before it
and returns a new one; nothing is changed in place (:mod:`quakefolio.pipeline.runner`)::

    RunInputs --hazard--> RunInputs (curves filled) --damage--> DamageProduct
              --events--> EventProduct --screening and what-if--> WhatIfProduct --store--> run folder

Block tasks (a site block of the hazard, a block of (site, class) pairs, a chunk of event
blocks) never receive these objects: they receive a :class:`RunRef` (paths and digests)
and their block, and resolve the products in their own process
(:func:`quakefolio.pipeline.stages.resolve`), so the same task functions run in this
thread, in a thread pool or on Dask workers.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np
import pandas as pd

__all__ = ["RunRef", "RunInputs", "SiteBlockResult", "WorkBlock", "BlockResult", "DamagePlan", "ClassDamage",
           "DamageProduct", "EventProduct", "WhatIfProduct", "CacheCounts", "frozen_mapping"]


def frozen_mapping(d):
    """A read-only view of a dict (the dict is copied first).

    Parameters
    ----------
    d : Mapping or iterable of (key, value)
        Anything ``dict`` accepts.

    Returns
    -------
    types.MappingProxyType
    """
    return MappingProxyType(dict(d))


@dataclass(frozen=True)
class RunRef:
    """What a block task needs to find its run's products in any process: small and picklable.

    Attributes
    ----------
    config_path : str
        Absolute path of the run config.
    inputs_sha256 : str
        Digest of the input files and resolved config the driver validated; a process
        whose files give another digest refuses to compute.
    hazard_file : str or None
        Compute mode, once the hazard stage has run: ``.npy`` file of the branch curves
        ``(n_src, n_gmm, n_im, n_sites, n_levels)`` [1/yr] the driver wrote for other
        processes.
    hazard_sha256 : str or None
        Digest of those curves (the key of the resolved products in a process).
    """

    config_path: str
    inputs_sha256: str
    hazard_file: str | None = None
    hazard_sha256: str | None = None


@dataclass(frozen=True)
class RunInputs:
    """Validated inputs of a run with the asset-to-site mapping (the ``read inputs`` stage).

    Attributes
    ----------
    config : quakefolio.pipeline.io.config.Config
    library : quakefolio.fragility.FragilityLibrary
    hazard : quakefolio.pipeline.io.ingest.HazardCurves
        Ingest mode: the tabulated curves [g, 1/yr].  Compute mode: the hazard sites, with
        curves only after the hazard stage (:func:`quakefolio.pipeline.stages.inputs.with_hazard`).
    exposure : pandas.DataFrame
        Validated exposure, one row per asset.
    site_index : ndarray of int (n_assets,)
        Hazard site of each asset.
    site_distance_km : ndarray (n_assets,) [km]
        Distance of each asset to its hazard site.
    input_hashes : Mapping
        Path and sha256 of every input file.
    inputs_sha256 : str
        Digest of the input files and the resolved config.
    warnings : tuple of str
        Lines for the run summary and manifest.
    hazard_model : quakefolio.pipeline.stages.hazard.HazardModel or None
        Compute mode: source and ground-motion logic tree, sites' Vs30, and (after the
        hazard stage) branch curves, statistics and disaggregation.
    group_terms : quakefolio.core.events.programme.GroupTerms or None
        ``[programme] group_terms_file`` with the exposure's ``terms_group`` column.
    work : quakefolio.pipeline.stages.sizes.WorkSize or None
        The estimated size of the run's work (counts and peak memory per stage).
    timings : Mapping
        Wall time [s] of reading and checking the inputs (``ingest_s``), for the manifest.
    """

    config: object
    library: object
    hazard: object
    exposure: pd.DataFrame
    site_index: np.ndarray
    site_distance_km: np.ndarray
    input_hashes: Mapping
    inputs_sha256: str
    warnings: tuple = ()
    hazard_model: object = None
    group_terms: object = None  # quakefolio.core.events.programme.GroupTerms or None
    work: object = None  # quakefolio.pipeline.stages.sizes.WorkSize or None
    timings: Mapping = field(default_factory=lambda: frozen_mapping({}))


@dataclass(frozen=True)
class SiteBlockResult:
    """A hazard or disaggregation site block's array and its content-cache counts.

    Attributes
    ----------
    block : tuple (lo, hi)
        Site slice.
    values : ndarray
        Curves ``(n_src, n_gmm, n_im, n_block_sites, n_levels)`` [1/yr] or disaggregation
        contributions ``(n_im, n_block_sites, n_rp, n_mag, n_dist, n_eps)`` [1/yr].
    from_cache, computed : int
        Sites read from the content cache and sites computed.
    moments : ndarray or None
        Disaggregation only: exact rate-weighted moments ``(n_im, n_block_sites, n_rp, 5)``
        (:data:`quakefolio.core.hazard.DISAGG_MOMENTS`).
    """

    block: tuple
    values: np.ndarray
    from_cache: int = 0
    computed: int = 0
    moments: np.ndarray | None = None


@dataclass(frozen=True)
class WorkBlock:
    """A block of damage work: one building class on a set of unique hazard sites."""

    block_id: int
    class_code: str
    sites: np.ndarray  # unique site indices


@dataclass(frozen=True)
class BlockResult:
    """Damage and loss of one :class:`WorkBlock`, per unique (site, class) pair.

    Attributes
    ----------
    block : WorkBlock
    ds_rates : ndarray (m, n_ds) [1/yr]
        Annual rate of reaching or exceeding each damage state.
    share_below, share_above : ndarray (m, n_ds) [-]
        Share of each rate from beyond the lowest / highest tabulated hazard level.
    eal_ratio : ndarray (m,) [1/yr]
        Expected annual loss over replacement value.
    loss_curve : ndarray (m, n_l) [1/yr]
        Annual rate of exceeding each configured loss ratio.
    ds_fractiles, eal_fractiles : ndarray or None
        Logic-tree fractiles ``(n_q, m, n_ds)`` and ``(n_q, m)`` [1/yr] when branches are
        propagated.
    """

    block: WorkBlock
    ds_rates: np.ndarray
    share_below: np.ndarray
    share_above: np.ndarray
    eal_ratio: np.ndarray
    loss_curve: np.ndarray
    ds_fractiles: np.ndarray | None = None
    eal_fractiles: np.ndarray | None = None


@dataclass(frozen=True)
class DamagePlan:
    """The damage stage's blocks, and the pairs read from the content cache instead.

    Attributes
    ----------
    blocks : tuple of WorkBlock
        Pairs to compute.
    cached : Mapping class -> (sites, dict of row arrays)
        Pairs whose results were in the cache.
    pair_keys : Mapping class -> (sites, ndarray (n, 32) uint8)
        Content key of every pair of a class (the cache is rewritten with them).
    counts : CacheCounts
    """

    blocks: tuple
    cached: Mapping = field(default_factory=lambda: frozen_mapping({}))
    pair_keys: Mapping = field(default_factory=lambda: frozen_mapping({}))
    counts: "CacheCounts" = None


@dataclass(frozen=True)
class ClassDamage:
    """Per-pair damage and loss of one building class, sorted by site.

    Attributes
    ----------
    code : str
    sites : ndarray of int (m,)
        Unique hazard sites of the class's assets.
    ds_rates, share_below, share_above, eal_ratio, loss_curve : ndarray
        As in :class:`BlockResult`, one row per site.
    """

    code: str
    sites: np.ndarray
    ds_rates: np.ndarray
    share_below: np.ndarray
    share_above: np.ndarray
    eal_ratio: np.ndarray
    loss_curve: np.ndarray


@dataclass(frozen=True)
class DamageProduct:
    """The damage stage: per-class pair results and the asset tables.

    Attributes
    ----------
    classes : Mapping code -> ClassDamage
    block_results : tuple of BlockResult
        The computed blocks (with logic-tree fractiles when branches are propagated).
    tables : Mapping name -> DataFrame
        ``asset_damage``, ``asset_loss``, ``asset_loss_curve`` (and fractile tables).
    warnings : tuple of str
    """

    classes: Mapping
    block_results: tuple
    tables: Mapping
    warnings: tuple = ()

    def pair_results(self):
        """Every class's pairs as one :class:`BlockResult` per class (cached pairs included).

        Returns
        -------
        list of BlockResult
            One per class in ``classes`` order, with block id -1 and the class's sites.
        """
        return [BlockResult(WorkBlock(-1, c.code, c.sites), c.ds_rates, c.share_below, c.share_above, c.eal_ratio,
                            c.loss_curve) for c in self.classes.values()]


@dataclass(frozen=True)
class EventProduct:
    """The event-based stage: tables (event, year and EP losses, breakdowns) and cross-checks."""

    tables: Mapping
    checks: Mapping
    from_cache: bool = False


@dataclass(frozen=True)
class WhatIfProduct:
    """The screening-and-what-if stage: its tables."""

    tables: Mapping
    from_cache: bool = False


@dataclass(frozen=True)
class CacheCounts:
    """Items read from the content cache and items computed, per cache stage name."""

    from_cache: Mapping = field(default_factory=lambda: frozen_mapping({}))
    computed: Mapping = field(default_factory=lambda: frozen_mapping({}))

    @staticmethod
    def of(stage, from_cache, computed):
        """Counts of one stage.

        Parameters
        ----------
        stage : str
            Cache stage name (e.g. ``"hazard"``).
        from_cache : int
            Items read from the content cache.
        computed : int
            Items computed.

        Returns
        -------
        CacheCounts
        """
        return CacheCounts(frozen_mapping({stage: int(from_cache)}), frozen_mapping({stage: int(computed)}))

    def __add__(self, other):
        if other is None:
            return self
        hits, miss = dict(self.from_cache), dict(self.computed)
        for k, v in other.from_cache.items():
            hits[k] = hits.get(k, 0) + v
        for k, v in other.computed.items():
            miss[k] = miss.get(k, 0) + v
        return CacheCounts(frozen_mapping(hits), frozen_mapping(miss))

    def as_dict(self):
        """``{stage: {"from_cache": n, "computed": n}}`` sorted by stage (the manifest's ``cache``).

        Returns
        -------
        dict of str -> dict of str -> int
        """
        stages = sorted(set(self.from_cache) | set(self.computed))
        return {s: {"from_cache": self.from_cache.get(s, 0), "computed": self.computed.get(s, 0)} for s in stages}
