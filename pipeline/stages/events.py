"""Event-based portfolio stage: stochastic events, correlated ground motions, losses, EP curves.

Sequence: :func:`prepare_events` (event set of the whole logic tree, each simulated year
one source-model x ground-motion branch combination by weight, or in per-branch mode one
source-model branch with a ground-motion model drawn per event by weight; the field
sampler on the hazard sites the portfolio uses) -> :func:`event_chunk` per chunk of whole random-number blocks (a flow
task each; results identical whatever the chunking; run in the main thread, a chunk splits its groups of ruptures
and its random-number blocks over ``[execution] max_workers`` threads, with the values of one thread,
:mod:`quakefolio.core.events.threads`) -> :func:`combine_events` (event and
year loss tables, AEP/OEP/TVaR, AAL with standard error, breakdowns, cross-checks against
the classical results of the same model).

Numerics live in :mod:`quakefolio.core.events.eventset` (event set, every random stream),
:mod:`quakefolio.core.hazard` (event ground motion on the classical engine's pairs),
:mod:`quakefolio.core.events.gmf` (correlated fields), :mod:`quakefolio.core.events.losses`
(losses per asset and event, policy terms, sums, cross-check statistics) and
:mod:`quakefolio.core.events.portfolio` (year losses, EP curves, AAL, TVaR); this module
gathers inputs, calls them and lays results out as tables.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from quakefolio.core.errors import InputError
from quakefolio.core.events.eventset import (
    EVENT_BLOCK_SIZE, STREAM_GMM_CHOICE, event_blocks, stochastic_event_set, stream_rng,
)
from quakefolio.core.events.losses import (
    aal_cross_check, annual_average_by, asset_aal_statistics, event_hazard_cross_check, exceedance_counts,
    portfolio_event_losses, sum_over_blocks,
)
from quakefolio.core.events.gmf import FieldSampler
from quakefolio.core.events.programme import GroupSums, chunk_programme_loss
from quakefolio.core.events.secondary import correlation_effect
from quakefolio.core.events.motion import event_ground_motion, event_ln_im
from quakefolio.core.events.threads import block_map, thread_count
from quakefolio.core.hazard import weighted_sum
from quakefolio.core.loss import expected_annual_loss, expected_annual_net_loss
from quakefolio.core.vulnerability import VulnerabilityTable
from quakefolio.core.events.portfolio import aal_with_standard_error, ep_from_years, full_ep_curve, tvar, year_loss
from quakefolio.pipeline.stages import breakdown as bd
from quakefolio.pipeline.stages import event_branches as eb
from quakefolio.pipeline.stages.programme import programme_digest, programme_tables
from quakefolio.pipeline.stages import people as pp
from quakefolio.pipeline.stages.regions import event_region_models

__all__ = ["EventModel", "FieldMemo", "FIELD_MEMO", "prepare_events", "event_chunks", "event_chunk", "combine_events"]


@dataclass(frozen=True)
class EventModel:
    """Inputs of the event-based stage, prepared once (read-only)."""

    branch_id: str
    branch_index: int
    ruptures: object
    source_ids: tuple
    events: object
    gmm_of_event: np.ndarray  # (n_events,) index into gmms
    gmms: list  # the active-crustal branches' models, then the other regions' (stages.regions.event_region_models)
    gmm_ids: list
    ims: list
    sites: np.ndarray  # indices into the hazard sites used by the portfolio
    site_lon: np.ndarray
    site_lat: np.ndarray
    site_vs30: np.ndarray
    sampler: object
    seed: int
    n_years: int
    truncation_sigma: float | None
    max_distance_km: float
    region: str
    ref: tuple
    loss_model: str
    levels_g: np.ndarray
    asset_site: np.ndarray  # (n_assets,) index into ``sites``
    classes: list  # [(code, asset indices, im index, DamageStateSet, unique local sites, pair of each asset)]
    value: np.ndarray
    deductible: np.ndarray
    limit: np.ndarray
    chunk_blocks: int
    # whole-tree mode (None / empty in per-branch mode): combination of every year, the
    # combinations [(source index, gmm index, weight)] and each source branch's first rupture
    year_combo: np.ndarray | None = None
    combos: tuple = ()
    rupture_offsets: np.ndarray | None = None
    correlation: float = 0.0  # within-group correlation of sampled damage and loss ratios [-]
    group_column: str = "building_class"
    group_names: tuple = ()
    group: np.ndarray | None = None  # (n_assets,) index into group_names
    group_terms: object = None  # GroupTerms of [programme] (None: no group terms)
    people: object = None  # PeopleModel: casualties, downtime, contents and interruption (stages.people)
    site_fields: dict = field(default_factory=dict)  # per used site: z1p0_km, z2p5_km [km], backarc (stages.regions)
    breakdown: tuple = ()  # [output] breakdown_columns: (column, group names, group of each asset) (stages.breakdown)
    workers: int = 1  # [execution] max_workers: threads of a chunk run in the main thread (core.events.threads)


def _groups(exposure, column):
    """Groups sharing secondary uncertainty: sorted distinct values of ``column`` and each asset's index."""
    names, group = np.unique(exposure[column].astype(str).to_numpy(dtype=object), return_inverse=True)
    return tuple(str(n) for n in names), group.astype(np.int64).ravel()


def extended_group(em, changed, new_class):
    """Group of every asset after appending ``changed`` assets moved to ``new_class`` (the what-if).

    Grouped by building class, the moved assets join the group of their new class (a new group
    after the others when no asset of the run has that class); grouped by another column,
    they keep their group.  Existing groups keep their indices, hence their random factors.

    Parameters
    ----------
    em : EventModel
        The run's event model.
    changed : ndarray of int
        Assets moved to the new class (appended after the run's assets).
    new_class : str
        Their new building class.

    Returns
    -------
    ndarray of int, shape (n_assets + len(changed),)
        Group index of every asset, the appended ones last.
    """
    if em.group_column != "building_class":
        extra = em.group[changed]
    elif new_class in em.group_names:
        extra = np.full(len(changed), em.group_names.index(new_class), dtype=np.int64)
    else:
        extra = np.full(len(changed), len(em.group_names), dtype=np.int64)
    return np.concatenate([em.group, extra])


def _branch(config, model):
    """Index of the per-branch mode's source branch; None for the whole logic tree (``""``)."""
    wanted = config.portfolio.source_branch
    ids = [b for b, _, _ in model.source_branches]
    if wanted:
        if wanted not in ids:
            raise InputError(config.path, f"unknown source branch {wanted!r}; the logic tree has {ids}",
                             column="portfolio.source_branch")
        return ids.index(wanted)
    return None


def single_blas_thread():
    """Run BLAS on one thread in this process from now on.

    The correlated fields are matrix products and factorisations whose last bits depend
    on how many threads BLAS splits them over; Dask workers run BLAS single-threaded, so
    the event stage does too everywhere, and a block gives bitwise the same losses in a
    thread pool, a single process or on a cluster.  (Process-wide and never undone, so
    concurrent tasks cannot race on it.)
    """
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")


def prepare_events(inputs):
    """Event set, per-event ground-motion model, sites, classes and the field sampler.

    By default (``[portfolio] source_branch = ""``) the whole logic tree enters: each
    simulated year is one (source-model, ground-motion) branch combination, the
    combinations holding their weights' shares of the years in random order, and the
    year's events are Poisson occurrences of its source branch's ruptures with its
    ground-motion model (:func:`quakefolio.pipeline.stages.event_branches.whole_tree_events`;
    why by year: :mod:`quakefolio.core.events.eventset`, "Whole logic tree").  With a
    branch id (per-branch mode, for sensitivity) the events are a Poisson stochastic event
    set over ``[portfolio] years`` from that branch's ruptures
    (:func:`quakefolio.core.events.eventset.stochastic_event_set`) and each event draws its
    ground-motion model by branch weight from its own random stream.  Events of ruptures of
    other tectonic regions take their region's models ([hazard] region_gmm_branches), drawn
    per event by weight (:func:`quakefolio.pipeline.stages.regions.event_region_models`).
    Fields are spatially
    correlated (Jayaram & Baker 2009) and cross-IM correlated (Baker & Jayaram 2008)
    (:class:`quakefolio.core.events.gmf.FieldSampler`).  Sets BLAS to one thread
    (:func:`single_blas_thread`).

    Parameters
    ----------
    inputs : RunInputs
        Compute-mode inputs with the hazard model.

    Returns
    -------
    EventModel

    Raises
    ------
    InputError
        When ``[portfolio] source_branch`` names no branch of the logic tree.
    """
    single_blas_thread()
    cfg = inputs.config
    pf = cfg.portfolio
    model = inputs.hazard_model
    b = _branch(cfg, model)
    tree = {}
    if b is None:
        bid, b = eb.WHOLE_TREE, -1
        rs, events, gmm_of_event, year_combo, combos, offsets = eb.whole_tree_events(model, pf.years, pf.seed)
        tree = dict(year_combo=year_combo, combos=combos, rupture_offsets=offsets)
    else:
        bid, _, src = model.source_branches[b]
        rs = src.ruptures
        events = stochastic_event_set(rs.rate, pf.years, pf.seed)
        weights = np.array([w for _, w, _ in model.gmm_branches])
        rng = stream_rng(pf.seed, STREAM_GMM_CHOICE)
        gmm_of_event = rng.choice(len(weights), size=events.n_events, p=weights / weights.sum()).astype(np.int64)
    gmm_of_event, gmms, gmm_ids = event_region_models(model, rs, gmm_of_event, events.rupture, pf.seed)
    used = np.unique(inputs.site_index)
    local = np.searchsorted(used, inputs.site_index)
    ex = inputs.exposure
    codes = ex.building_class.to_numpy()
    classes = []
    for code in sorted(set(codes)):
        dss = inputs.library[code]
        assets = np.flatnonzero(codes == code)
        usites, pair = np.unique(local[assets], return_inverse=True)
        classes.append((code, assets, model.ims.index(dss.im), dss, usites, pair))
    sampler = FieldSampler(inputs.hazard.lon[used], inputs.hazard.lat[used], model.ims,
                           spatial_correlation=pf.spatial_correlation,
                           cross_im_correlation=pf.cross_im_correlation,
                           vs30_clustering=pf.correlation_range == "clustered_site_conditions")
    per_task = max(1, int(np.ceil(cfg.execution.event_block_size / EVENT_BLOCK_SIZE)))
    group_names, group = _groups(ex, pf.secondary_group)
    return EventModel(
        branch_id=bid, branch_index=b, ruptures=rs, source_ids=tuple(rs.source_ids), events=events,
        gmm_of_event=gmm_of_event, gmms=gmms, gmm_ids=gmm_ids, ims=list(model.ims), sites=used,
        site_fields={n: v[used] for n, v in model.site_fields.items()},
        site_lon=inputs.hazard.lon[used], site_lat=inputs.hazard.lat[used], site_vs30=model.site_vs30[used],
        sampler=sampler, seed=pf.seed, n_years=pf.years, truncation_sigma=model.truncation_sigma,
        max_distance_km=model.max_distance_km, region=model.region, ref=model.ref, loss_model=pf.loss_model,
        levels_g=model.levels_g, asset_site=local, classes=classes, value=ex.replacement_value.to_numpy(),
        deductible=ex.deductible.to_numpy(dtype=float), limit=ex.limit.to_numpy(dtype=float), chunk_blocks=per_task,
        correlation=pf.secondary_correlation, group_column=pf.secondary_group, group_names=group_names, group=group,
        group_terms=inputs.group_terms, people=pp.prepare_people(inputs, events.n_events, pf.seed, classes),
        breakdown=bd.breakdown_groups(ex, cfg.output.breakdown_columns), workers=cfg.execution.max_workers, **tree)


def event_chunks(em):
    """Chunks of whole random-number blocks: [(first_block, stop_block)].

    Parameters
    ----------
    em : EventModel
        From :func:`prepare_events` (``chunk_blocks`` blocks per chunk).

    Returns
    -------
    list of (int, int)
        Consecutive, covering every block of the event set.
    """
    n_blocks = len(event_blocks(em.events.n_events, EVENT_BLOCK_SIZE))
    return [(lo, min(n_blocks, lo + em.chunk_blocks)) for lo in range(0, n_blocks, em.chunk_blocks)]


@dataclass
class ChunkResult:
    start: int
    stop: int
    ground_up: np.ndarray  # (n_ev,) [currency]
    net: np.ndarray
    asset_sum: np.ndarray  # (n_blocks, 2, n_assets): ground-up, net sums over each block's events [currency]
    asset_sumsq: np.ndarray  # (n_blocks, 2, n_assets) [currency^2]
    class_sum: np.ndarray  # (n_blocks, n_classes, 2)
    exceed_counts: np.ndarray  # (n_im, n_sites, n_levels)
    independent: tuple | None = None  # (ground-up, net) (n_ev,) with independent draws (sampled, correlation > 0)
    programme: np.ndarray = None  # (n_ev,) after building and group terms [currency]
    group_sum: np.ndarray = None  # (n_blocks, 2, n_groups): before, after group terms [currency]
    people: np.ndarray = None  # (n_ev, 4): casualties, downtime, contents and interruption loss (stages.people)
    breakdown: tuple = None  # per breakdown column, ground-up and net (n_ev, n_groups) sums (stages.breakdown)


def _correlated(em):
    """True when the run samples damage with a within-group correlation above 0."""
    return em.loss_model != "mean_damage_ratio" and em.correlation > 0


def _field_inputs(em):
    """The event model's parts the ground-motion fields depend on (compared by identity)."""
    return (em.events, em.ruptures, em.gmm_of_event, em.gmms, em.ims, em.site_lon, em.site_lat, em.site_vs30,
            em.site_fields, em.sampler, em.seed, em.truncation_sigma, em.max_distance_km, em.region, em.ref,
            em.levels_g)


class FieldMemo:
    """Ground-motion fields [g] and exceedance counts of the event stage's chunks, kept in this process
    for the what-if's rerun of the same events (up to ``max_bytes``).

    An entry is found only for an event model whose event set, ruptures, models, sites,
    sampler and settings are the very objects of the one that stored it (the what-if's
    model is a copy of the run's with other classes and values): the same fields, which the
    rerun would otherwise compute again with the same numbers.  Arrays are kept read-only.
    Thread-safe.
    """

    def __init__(self, max_bytes):
        self.max_bytes = int(max_bytes)
        self.enabled = False  # set by the runner for a run whose what-if reruns its events
        self._entries = {}
        self._bytes = 0
        self._lock = threading.Lock()

    def get(self, em, chunk):
        """The kept fields of a chunk of events.

        Parameters
        ----------
        em : EventModel
        chunk : (int, int)
            First and stop random-number block (:func:`event_chunks`).

        Returns
        -------
        (ndarray, ndarray) or None
            Fields [g] (n_ev, n_im, n_sites) and exceedance counts (n_im, n_sites,
            n_levels) of ``chunk`` for ``em``; None where not kept.
        """
        entry = self._entries.get(tuple(chunk))
        if entry is None or len(entry[0]) != len(_field_inputs(em)):
            return None
        if not all(a is b for a, b in zip(entry[0], _field_inputs(em))):
            return None
        return entry[1], entry[2]

    def put(self, em, chunk, fields, counts):
        """Keep the fields of a chunk of events while they fit (made read-only).

        Parameters
        ----------
        em : EventModel
        chunk : (int, int)
        fields : ndarray, shape (n_ev, n_im, n_sites) [g]
        counts : ndarray, shape (n_im, n_sites, n_levels)
        """
        size = int(fields.nbytes) + int(counts.nbytes)
        with self._lock:
            if tuple(chunk) in self._entries or self._bytes + size > self.max_bytes:
                return
            fields.flags.writeable = False
            counts.flags.writeable = False
            self._entries[tuple(chunk)] = (_field_inputs(em), fields, counts)
            self._bytes += size

    def clear(self, enabled=False):
        """Forget every entry.

        Parameters
        ----------
        enabled : bool
            Keep new entries from now on.
        """
        with self._lock:
            self._entries.clear()
            self._bytes = 0
            self.enabled = bool(enabled)


#: Bytes of event fields kept for the what-if (the demo's 50,000 years need about 40 MB).
FIELD_MEMO_BYTES = 512 * 2 ** 20
#: The process's memo: filled by :func:`event_chunk` when the runner enables it (``enabled``),
#: read by the what-if's rerun (:func:`quakefolio.pipeline.stages.whatif.rerun_events`),
#: cleared by the runner after the what-if.
FIELD_MEMO = FieldMemo(FIELD_MEMO_BYTES)


def _fields(em, start, stop, rows, map_fn):
    """Ground-motion fields [g] of the chunk's events at the portfolio's sites, shape (n_ev, n_im, n_sites),
    and their exceedance counts (n_im, n_sites, n_levels).

    The ground motion of the events (groups of ruptures on ``map_fn``), then per
    random-number block (on ``map_fn``) its residuals, ln IM, exceedance counts and IM,
    written into the median's array (the chunk holds one copy of each field less); the
    counts are integers, summed after.  Every value is the one of a single thread
    (:mod:`quakefolio.core.events.threads`).
    """
    mu, tau, phi = event_ground_motion(em.site_lon, em.site_lat, em.site_vs30, em.ruptures,
                                       em.events.rupture[start:stop], em.gmm_of_event[start:stop], em.gmms, em.ims,
                                       max_distance_km=em.max_distance_km, region=em.region, ref=em.ref,
                                       site_fields=em.site_fields, map_fn=map_fn)

    def block(row):
        b, lo, hi = row
        res = em.sampler.sample_event_blocks(em.seed, em.events.n_events, [b])
        im = event_ln_im(mu[lo:hi], tau[lo:hi], phi[lo:hi], res.eta, res.eps, em.truncation_sigma, out=mu[lo:hi])
        counts = exceedance_counts(im, em.levels_g)
        np.exp(im, out=im)  # [g]; 0 beyond the integration distance
        return counts

    counts = map_fn(block, rows)
    return mu, sum(counts[1:], counts[0]) if counts else exceedance_counts(mu, em.levels_g)


def event_chunk(em, chunk, independent=True):
    """Losses of one chunk of events (whole random-number blocks).

    Parameters
    ----------
    em : EventModel
        From :func:`prepare_events`.
    chunk : (int, int)
        First and stop random-number block (:func:`event_chunks`).
    independent : bool
        With correlated sampled damage, also the event losses of independent draws on the
        same ground motions (``ChunkResult.independent``).

    Returns
    -------
    ChunkResult
        Event losses [currency], per-block asset and class sums and the events' IM
        exceedance counts (:func:`quakefolio.core.events.losses.portfolio_event_losses`).
    """
    single_blas_thread()
    with block_map(thread_count(em.workers)) as map_fn:
        return _event_chunk(em, chunk, independent, map_fn)


def _event_chunk(em, chunk, independent, map_fn):
    """:func:`event_chunk` with the ordered map of its blocks (:func:`quakefolio.core.events.threads.block_map`)."""
    b0, b1 = chunk
    blocks = event_blocks(em.events.n_events, EVENT_BLOCK_SIZE)
    start, stop = int(blocks[b0, 0]), int(blocks[b1 - 1, 1])
    rows = [(b, int(blocks[b, 0]) - start, int(blocks[b, 1]) - start) for b in range(b0, b1)]
    kept = FIELD_MEMO.get(em, chunk)
    if kept is None:
        im, counts = _fields(em, start, stop, rows, map_fn)  # (n_ev, n_im, n_sites) [g]
        if FIELD_MEMO.enabled:  # kept for a rerun of the same events (the what-if), which reads them
            FIELD_MEMO.put(em, chunk, im, counts)
    else:
        im, counts = kept
    classes = [(assets, i_im, dss.medians, dss.betas, dss.mean_damage_ratio, dss.cov, usites, pair)
               if dss.has_damage_states else
               (assets, i_im, VulnerabilityTable(dss.levels, dss.mean_loss_ratio, dss.cov), None, None, None, usites,
                pair)
               for _, assets, i_im, dss, usites, pair in em.classes]
    gt = em.group_terms
    groups = None if gt is None else GroupSums(gt.group_of_asset, len(gt.ids), stop - start)
    hooks, by_group = bd.chunk_hooks(em.breakdown, groups, stop - start)
    gu_ev, net_ev, asset_sum, asset_sumsq, class_sum = portfolio_event_losses(
        im, classes, em.value, em.deductible, em.limit, loss_model=em.loss_model, seed=em.seed, blocks=rows,
        correlation=em.correlation, group=em.group, group_sums=hooks, map_fn=map_fn)
    programme, group_sum = chunk_programme_loss(gt, groups, net_ev, [(lo, hi) for _, lo, hi in rows])
    other = None
    if independent and _correlated(em):  # the same ground motions and own draws, no group factors: the effect
        other = portfolio_event_losses(im, classes, em.value, em.deductible, em.limit, loss_model=em.loss_model,
                                       seed=em.seed, blocks=rows, correlation=em.correlation, twin=True)[:2]
    return ChunkResult(start, stop, gu_ev, net_ev, asset_sum, asset_sumsq, class_sum, counts, other, programme,
                       group_sum, pp.chunk_consequences(em, im, start, stop),
                       None if by_group is None else by_group.result())


def combine_events(em, inputs, results):
    """Tables and cross-checks of the event-based stage.

    Parameters
    ----------
    em : EventModel
    inputs : :class:`quakefolio.pipeline.stages.products.RunInputs`
    results : list of ChunkResult
        Every chunk's result (any order).

    Returns
    -------
    tables : dict name -> DataFrame
        ``event_loss``, ``year_loss``, ``portfolio_ep``, ``portfolio_ep_curve``,
        ``portfolio_summary``, ``asset_event_loss``, ``portfolio_breakdown``; in whole-tree
        mode also ``portfolio_branch_summary``, ``portfolio_branch_ep`` and
        ``portfolio_branch_fractiles`` (:func:`quakefolio.pipeline.stages.event_branches.branch_tables`),
        the pooled tables being the weighted-mean EP of the logic tree; with correlated
        sampled damage ``portfolio_correlation_effect`` (:func:`correlation_effect_table`).
    checks : dict
        Event-based vs classical statistics (:mod:`quakefolio.core.events.losses`).
    """
    results = sorted(results, key=lambda r: r.start)
    ev = em.events
    n_years = em.n_years
    gu = np.concatenate([r.ground_up for r in results]) if results else np.zeros(0)
    net = np.concatenate([r.net for r in results]) if results else np.zeros(0)
    rup = ev.rupture
    rps = np.asarray(inputs.config.portfolio.return_periods_yr, dtype=float)
    event_loss = pd.DataFrame({
        "event_id": ev.event_id, "year": ev.year.astype(np.int64), "rupture_id": rup,
        "source_id": np.array(em.source_ids, dtype=object)[em.ruptures.source_index[rup]],
        "magnitude": em.ruptures.mag[rup], "gmm": np.array(em.gmm_ids, dtype=object)[em.gmm_of_event],
        "ground_up_loss": gu, "net_loss": net,
    })
    years = {}
    for basis, loss in (("ground_up", gu), ("net", net)):
        years[basis] = year_loss(ev.year, loss, n_years)
    year_table = pd.DataFrame({
        "year": np.arange(1, n_years + 1, dtype=np.int64),
        "n_events": np.bincount(ev.year, minlength=n_years + 1)[1:].astype(np.int64),
        "ground_up_loss": years["ground_up"][0], "net_loss": years["net"][0],
        "max_event_ground_up_loss": years["ground_up"][1], "max_event_net_loss": years["net"][1],
    })
    tree = em.year_combo is not None
    if tree:  # the source branch of each event and its rupture index within that branch
        branch_of_event, event_loss["rupture_id"] = eb.event_branch_columns(em, inputs.hazard_model)
        event_loss.insert(event_loss.columns.get_loc("gmm"), "source_branch", branch_of_event)
        sid, gid = eb.branch_ids(em, inputs.hazard_model)
        year_table.insert(1, "source_branch", np.array(sid, dtype=object)[em.year_combo])
        year_table.insert(2, "gmm", np.array(gid, dtype=object)[em.year_combo])
    ep_rows, curve_rows, summary_rows = [], [], []
    sampled = em.loss_model != "mean_damage_ratio"
    for basis, ev_loss in (("ground_up", gu), ("net", net)):
        agg, occ = years[basis]
        ep_rows.append(pd.DataFrame({"return_period_yr": rps, "aep_loss": ep_from_years(agg, rps),
                                     "oep_loss": ep_from_years(occ, rps), "tvar_loss": tvar(agg, rps),
                                     "basis": basis}))
        for metric, arr in (("aep", agg), ("oep", occ)):
            loss, prob, rp = full_ep_curve(arr)
            curve_rows.append(pd.DataFrame({"basis": basis, "metric": metric, "loss": loss,
                                            "annual_exceedance_prob": prob, "return_period_yr": rp}))
        aal, se = aal_with_standard_error(agg)
        if tree:  # compound Poisson, exact for years stratified by branch (core.events.eventset notes)
            se = np.sqrt(np.sum(ev_loss * ev_loss)) / n_years
        summary_rows.append({"basis": basis, "aal": aal, "aal_standard_error": se, "n_events": ev.n_events,
                             "n_years": n_years, "seed": em.seed, "source_branch": em.branch_id,
                             "loss_model": em.loss_model,
                             "secondary_correlation": em.correlation if sampled else np.nan,
                             "secondary_group": em.group_column if sampled else ""})
    asset_sum = sum_over_blocks([r.asset_sum for r in results])
    asset_sumsq = sum_over_blocks([r.asset_sumsq for r in results])
    class_sum = sum_over_blocks([r.class_sum for r in results])
    checks, classical = _cross_checks(em, inputs, asset_sum, asset_sumsq, years, results,
                                      summary_rows[0]["aal_standard_error"] if tree else None)
    ex = inputs.exposure
    aal_gu, aal_net, aal_se, z_score = asset_aal_statistics(asset_sum, asset_sumsq, n_years, classical)
    asset_aal = pd.DataFrame({
        "asset_id": ex.asset_id.to_numpy(), "building_class": ex.building_class.to_numpy(),
        "aal_ground_up": aal_gu, "aal_net": aal_net, "aal_ground_up_standard_error": aal_se,
        "classical_eal_same_branch": classical, "z_score": z_score,
    })
    src_idx = em.ruptures.source_index[rup]
    n_src = len(em.source_ids)
    breakdown = [pd.DataFrame({"dimension": "building_class", "key": [c[0] for c in em.classes],
                               "aal_ground_up": class_sum[:, 0] / n_years, "aal_net": class_sum[:, 1] / n_years})]
    breakdown.append(pd.DataFrame({
        "dimension": "source", "key": list(em.source_ids),
        "aal_ground_up": annual_average_by(src_idx, gu, n_src, n_years),
        "aal_net": annual_average_by(src_idx, net, n_src, n_years)}))
    summary = pd.DataFrame(summary_rows)
    classical_net = _classical_net(em, inputs)
    summary["classical_eal_same_branch"] = [float(np.sum(classical)), float(np.sum(classical_net))]
    checks["portfolio_net_aal_vs_classical_net_eal"] = _net_check(years["net"][0], classical_net, em.loss_model,
                                                                  summary_rows[1]["aal_standard_error"])
    tables = {
        "event_loss": event_loss, "year_loss": year_table, "portfolio_ep": pd.concat(ep_rows, ignore_index=True),
        "portfolio_ep_curve": pd.concat(curve_rows, ignore_index=True), "portfolio_summary": summary,
        "asset_event_loss": asset_aal, "portfolio_breakdown": pd.concat(breakdown, ignore_index=True),
        **programme_tables(em, inputs, results),
    }
    _optional_tables(em, inputs, results, (gu, net), years, rps, tables, checks)
    return tables, checks


def _optional_tables(em, inputs, results, losses, years, rps, tables, checks):
    """Add the tables and checks of the options in use (filled in place).

    Whole logic tree: per-branch tables and checks; correlated sampled damage: the
    correlation's effect against independent draws; people and time: event consequences.

    Parameters
    ----------
    em : EventModel
    inputs : RunInputs
    results : list of ChunkResult
        In event order.
    losses : (ndarray, ndarray)
        Ground-up and net loss of every event [currency].
    years : dict basis -> (aggregate, largest event) year losses [currency]
    rps : ndarray [yr]
        Return periods.
    tables, checks : dict
        The stage's tables and checks, completed here.
    """
    if em.year_combo is not None:
        model = inputs.hazard_model
        tables.update(eb.branch_tables(em, model, *losses, years, rps, model.fractiles,
                                       eb.classical_by_combination(em, model, inputs.config.fragility.tail)))
        checks["branch_aal_vs_classical_eal"] = _branch_check(tables["portfolio_branch_summary"])
    if _correlated(em):
        tables["portfolio_correlation_effect"] = correlation_effect_table(em, results, years, rps)
        aal = tables["portfolio_correlation_effect"].query("metric == 'aal'")
        checks["aal_correlated_vs_independent"] = {
            "secondary_correlation": em.correlation, "secondary_group": em.group_column,
            "change": aal.change.tolist(), "standard_error_of_change": aal.standard_error_of_change.tolist(),
            "passed": bool((aal.change.abs() <= 3 * aal.standard_error_of_change).all())}
    if em.breakdown:
        tables["breakdown_ep"] = bd.breakdown_ep_table(em.breakdown, [r.breakdown for r in results], em.events.year,
                                                       em.n_years, rps)
    if em.people is not None and results:
        tables.update(pp.event_consequence_tables(em, inputs, np.concatenate([r.people for r in results]),
                                                  _branch_mean_curves(em, inputs)))


def _branch_check(summary):
    """Per branch combination: event-based AAL vs that combination's classical EAL (ground-up)."""
    gu = summary[summary.basis == "ground_up"]
    return [{"source_branch": r.source_branch, "gmm": r.gmm, "weight": float(r.weight), "n_years": int(r.n_years),
             "event_based_aal": float(r.aal), "standard_error": float(r.aal_standard_error),
             "classical_eal": float(r.classical_eal), "z": float(r.z_score)} for r in gu.itertuples()]


def correlation_effect_table(em, results, years, rps):
    """PML, TVaR and AAL with the configured within-group correlation against independent sampling.

    Both come from the same events and ground-motion fields; only the damage and loss-ratio
    draws differ (:func:`quakefolio.core.events.secondary.correlation_effect`).

    Parameters
    ----------
    em : EventModel
    results : list of ChunkResult
        In event order, each with its ``independent`` event losses.
    years : dict basis -> (aggregate, largest event) year losses [currency]
        Of the correlated (headline) simulation.
    rps : ndarray [yr]
        Return periods.

    Returns
    -------
    pandas.DataFrame
        ``portfolio_correlation_effect`` rows for the ground-up and net bases.
    """
    rows = []
    for j, basis in enumerate(("ground_up", "net")):
        loss = np.concatenate([r.independent[j] for r in results]) if results else np.zeros(0)
        agg, occ = year_loss(em.events.year, loss, em.n_years)
        effect = correlation_effect(years[basis][0], agg, years[basis][1], occ, rps)
        rows.append(pd.DataFrame({"basis": basis, **effect, "secondary_correlation": em.correlation,
                                  "secondary_group": em.group_column}))
    return pd.concat(rows, ignore_index=True)


def _branch_mean_curves(em, inputs):
    """Classical curves the event set samples (n_im, n_sites_used, n_lev): all branches by weight
    (whole tree) or the event set's source branch, GMM-weighted (per-branch mode)."""
    model = inputs.hazard_model
    if em.year_combo is not None:
        return eb.mean_curves(model, em.sites)
    wg = np.array([w for _, w, _ in model.gmm_branches])
    curves = weighted_sum(model.branch_curves[em.branch_index], wg)
    return curves[:, em.sites]


def _classical_net(em, inputs):
    """Classical net EAL [currency/yr] per asset of the same branch and GMM weights (closed form per state)."""
    curves = _branch_mean_curves(em, inputs)
    out = np.zeros(len(em.value))
    for _, assets, i_im, dss, usites, pair in em.classes:
        ds, mdr, cov = dss.loss_states(em.levels_g, curves[i_im, usites], tail=inputs.config.fragility.tail)
        if mdr.ndim > 1:  # a vulnerability class: bins of its own per pair
            mdr, cov = mdr[pair], cov[pair]
        out[assets] = expected_annual_net_loss(ds[pair], mdr, cov, em.value[assets],
                                               em.deductible[assets], em.limit[assets])
    return out


def _net_check(year_net, classical_net, loss_model, se):
    """Event-based net AAL against the classical net EAL of the same model (within 3 standard errors).

    ``se`` is the standard error of the net AAL (``portfolio_summary``: compound Poisson over the
    whole logic tree, else that of the year losses).
    """
    aal, _ = aal_with_standard_error(year_net)
    total = float(np.sum(classical_net))
    return {"event_based_aal": float(aal), "standard_error": float(se), "classical_eal": total,
            "z": float((aal - total) / se) if se > 0 else 0.0, "passed": bool(abs(aal - total) <= 3 * se),
            "loss_model": loss_model}


def _cross_checks(em, inputs, asset_sum, asset_sumsq, years, results, total_se=None):
    """Event-based vs classical results of the same model (all branches, or one source branch, by weight).

    ``total_se`` replaces the standard error of the portfolio AAL (whole tree: compound Poisson).
    """
    n = em.n_years
    curves = _branch_mean_curves(em, inputs)
    classical = np.zeros(len(em.value))
    for code, assets, i_im, dss, usites, pair in em.classes:
        ds, mdr, _ = dss.loss_states(em.levels_g, curves[i_im, usites], tail=inputs.config.fragility.tail)
        classical[assets] = expected_annual_loss(ds, mdr)[pair] * em.value[assets]
    aal = aal_cross_check(asset_sum[0], asset_sumsq[0], n, classical, years["ground_up"][0], standard_error=total_se)
    # event-based hazard: rate of events with IM > x, vs the classical curve, where the
    # classical rate is above 10/N (Poisson standard error sqrt(lambda / N))
    hazard = event_hazard_cross_check(sum(r.exceed_counts for r in results), curves, n)
    per_asset = ("assets", "within_3_standard_errors", "share_within_3_standard_errors", "max_abs_z")
    total = ("event_based_aal", "standard_error", "classical_eal", "z", "passed")
    checks = {
        "asset_aal_vs_classical_eal": {**{k: aal[k] for k in per_asset}, "loss_model": em.loss_model},
        "portfolio_aal_vs_classical_eal": {k: aal[k] for k in total},
        "event_hazard_vs_classical": hazard,
        "source_branch": em.branch_id,
        "note": "in either loss model the event-based AAL is an unbiased estimate of the classical EAL of the "
                "same source branch and GMM weights, ground-up and net: the mean-damage-ratio mode uses, per asset "
                "and event, the expected ground-up loss and the expected net loss (deductible and limit taken "
                "over the loss distribution in closed form) given the ground motion, i.e. the conditional "
                "expectations of the sampled mode's losses; its PML and TVaR leave out the damage and "
                "loss-ratio scatter and are not those of the sampled mode. 99.7% of assets are expected within "
                "3 standard errors",
    }
    if em.year_combo is not None:
        checks["note"] = ("in either loss model the event-based AAL is an unbiased estimate of the classical EAL of "
                          "every logic-tree branch by weight, ground-up and net (years stratified by branch "
                          "combination; compound-Poisson standard error; the mean-damage-ratio mode uses the "
                          "conditional expectations of the sampled mode's losses given the ground motion, the net "
                          "one in closed form); 99.7% of assets are expected within 3 standard errors")
    return checks, classical


# --- cache key of the whole stage (entry: StageCache.get_tables / put_tables) -----------------

def event_cache_key(inputs):
    """Digest of everything the event-based results depend on.

    The hazard model's digest, the resolved ``[portfolio]`` and ``[hazard]`` sections, the
    tail policy, the digests of the building classes the exposure uses and the exposure
    file's sha256 (and the code version, :func:`quakefolio.pipeline.io.cache.digest`).

    Parameters
    ----------
    inputs : RunInputs
        Compute-mode inputs with the hazard model.

    Returns
    -------
    str
        64 hex characters.
    """
    from quakefolio.pipeline.io.cache import digest
    from quakefolio.pipeline.io.cache import fragility_class_digests

    cfg = inputs.config
    model = inputs.hazard_model
    used = sorted(set(inputs.exposure.building_class))
    classes = fragility_class_digests(inputs.library)
    return digest("events", model.digest, cfg.resolved()["portfolio"], cfg.resolved()["hazard"],
                  cfg.fragility.tail, {c: classes[c] for c in used}, inputs.input_hashes["exposure"]["sha256"],
                  *programme_digest(inputs), pp.people_cache_key(inputs), list(cfg.output.breakdown_columns))
