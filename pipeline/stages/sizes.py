r"""Size of a run's work, estimated from its inputs before any stage runs, and the refusal of
what cannot fit in memory.

``check`` and ``run`` read inputs the same way (:func:`quakefolio.pipeline.stages.inputs.load_inputs`),
so both refuse, with one line naming the config key (or the source-model key) and the
estimate, a run whose largest arrays would not fit, before anything is computed or written.

Counts
------
Ruptures per source model (counted before they are built: :mod:`quakefolio.core.sources.counts`;
a file whose count alone cannot fit is refused by
:func:`quakefolio.pipeline.io.source_model.load_source_model` with the key that makes it
explode), hazard sites, unique (site, class) pairs, sites x ruptures (the hazard work per
ground-motion model and IM), simulated years and the expected number of events,
:math:`E = N \sum_b w_b \Lambda_b` (whole logic tree; :math:`\Lambda_b` the total rupture
rate of source branch :math:`b`) or :math:`N \Lambda_b` (one branch).

Peak memory
-----------
Each stage's peak is the sum of the arrays it holds at its largest moment, in bytes per
unit (the constants below, each with the arrays it stands for; the per-unit sizes were set
from the ``tracemalloc`` peaks of those stages on the mini inputs scaled up in one dimension
at a time, and ``tests/test_sizes.py`` holds the estimates within a factor of 2 of measured
peaks):

* hazard: the ruptures (with the pieces of those on bent faults); per task (``site_block_size`` sites, ``max_workers`` tasks at
  once) every (site, rupture) pair of the largest source model with its distances,
  ground-motion inputs and results (:data:`PAIR_BYTES` + :data:`PAIR_IM_BYTES` per IM),
  an upper bound since pairs beyond the integration distance are dropped; the branch
  curves, statistics and disaggregation of every site;
* damage and loss: per task the (site, class) pairs of a block with their IM levels,
  loss ratios and damage states; the asset tables;
* event-based losses per task: the sites x distinct ruptures of a chunk of events
  (expected number of distinct ruptures among ``n`` draws,
  :math:`\sum_r 1 - e^{-n p_r}`), the chunk's fields and per-asset losses; the
  correlated-field factors (n x n per distinct correlation range);
* event-based tables: per simulated year (:data:`YEAR_BYTES`) and per event
  (:data:`EVENT_BYTES`) the event set, year losses, EP curves and their Parquet
  conversion, and the per-block asset sums of every chunk.

The screening and what-if stage re-runs the same event chunks one at a time and is not
estimated apart. A run of the ``hazard`` command alone is checked against the whole run.

Memory available
----------------
:func:`available_memory_bytes`: on Linux ``MemAvailable`` of ``/proc/meminfo`` (the kernel's
estimate of what new allocations can get without swapping), lowered to the room left under
a cgroup memory limit when one applies (containers: v2 ``memory.max - memory.current``,
v1 ``memory.limit_in_bytes - memory.usage_in_bytes``); elsewhere
``os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")``; unknown on systems with
neither (then only the plain bounds apply and ``check`` says so).  A run may plan for
:data:`MEMORY_SHARE` of it: the rest is left to the interpreter, the libraries and other
programs, and absorbs the error of the estimates.  The environment variable
``QUAKEFOLIO_MEMORY_GIB`` replaces that budget (a machine whose detection is wrong, a
shared machine where a run should stay small, reproducible checks in tests).
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.events.eventset import EVENT_BLOCK_SIZE
from quakefolio.core.events.gmf import EIGEN_MAX_SITES
from quakefolio.core.hazard import DisaggBins
from quakefolio.core.vulnerability import SUB_BINS
from quakefolio.fragility.library import read_toml
from quakefolio.pipeline.io.source_model import RuptureLimit

__all__ = ["Budget", "Term", "StageSize", "WorkSize", "memory_budget", "available_memory_bytes", "rupture_limit",
           "estimate_work", "check_work", "check_hazard_work", "format_bytes", "MEMORY_ENV", "MEMORY_SHARE"]

#: Environment variable replacing the detected budget [GiB].
MEMORY_ENV = "QUAKEFOLIO_MEMORY_GIB"
#: Share of the available memory a run may plan for.
MEMORY_SHARE = 0.75
_GIB = float(1 << 30)

#: One rupture of a RuptureSet: ten float64 fields, the int64 source index, 4 x 3 float64 corners.
RUPTURE_BYTES = 184
#: One piece of a rupture on a bent fault (one per segment it spans): 4 x 3 float64 corners, the
#: int64 index of its rupture.
PIECE_BYTES = 104
#: Peak per rupture while a source model is built: the set itself, the per-magnitude corner
#: offsets and positions, the projected corners and the copies of the final checks.
RUPTURE_BUILD_BYTES = 640
#: Per (site, rupture) pair of a hazard task: mask, indices, distances (computed twice),
#: the ground-motion inputs (13 float64 arrays) and the pair rates.
PAIR_BYTES = 400
#: Per pair and IM: a ground-motion model's medians, tau, phi, sigma and work arrays,
#: two models' results alive at once.
PAIR_IM_BYTES = 130
#: Per simulated year: branch of the year, year losses (two bases, aggregate and largest),
#: the year table, four full EP curves sorted into tables, and their Arrow copies when stored
#: (string columns go to Arrow without Python objects since the tables are built for Arrow).
YEAR_BYTES = 450
#: Per event: the event set and its sort, the model of each event, the event-loss table
#: (eight columns, two of strings) and its Arrow copy, ground-up and net losses.
EVENT_BYTES = 420
#: Per asset: the damage, loss and loss-curve tables (one row per asset and loss ratio).
ASSET_BYTES = 160
#: Disaggregation bins per (IM, site, return period).
_DISAGG_BINS = int(np.prod(DisaggBins.default().shape))


def format_bytes(n):
    """``n`` bytes as a short text with a binary unit ("310 MiB", "6.2 GiB").

    Parameters
    ----------
    n : float
        Bytes.

    Returns
    -------
    str
    """
    for unit, size in (("TiB", 1 << 40), ("GiB", 1 << 30), ("MiB", 1 << 20), ("KiB", 1 << 10)):
        if n >= size:
            v = n / size
            return f"{v:.1f} {unit}" if v < 100 else f"{v:,.0f} {unit}"
    return f"{int(n)} B"


# ----------------------------------------------------------------------------- memory available

def _meminfo_available(path):
    try:
        with open(path, encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _read_int(path):
    try:
        with open(path, encoding="ascii") as fh:
            text = fh.read().strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None  # "max": no limit


def _cgroup_room(root):
    """Bytes left under a cgroup memory limit (v2, then v1), or None without a limit."""
    for limit_file, usage_file in (("memory.max", "memory.current"),
                                   ("memory/memory.limit_in_bytes", "memory/memory.usage_in_bytes")):
        limit = _read_int(os.path.join(root, limit_file))
        usage = _read_int(os.path.join(root, usage_file))
        if limit is not None and usage is not None and limit < 1 << 60:  # v1 "no limit" is ~2**63
            return max(0, limit - usage)
    return None


def available_memory_bytes(meminfo="/proc/meminfo", cgroup="/sys/fs/cgroup"):
    """Memory new allocations can get now [bytes], or None when the system does not tell.

    Parameters
    ----------
    meminfo : str
        The kernel's memory report (Linux).
    cgroup : str
        Mount point of the control groups (a container's memory limit).

    Returns
    -------
    int or None
        ``MemAvailable``, lowered to the room under a cgroup limit; else the available
        physical pages times the page size (module notes).
    """
    found = _meminfo_available(meminfo)
    if found is None:
        try:
            found = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
        except (ValueError, OSError, AttributeError):
            found = None
    room = _cgroup_room(cgroup)
    known = [v for v in (found, room) if v is not None]
    return min(known) if known else None


@dataclass(frozen=True)
class Budget:
    """Memory a run may plan for and how it was set (the end of a refusal line).

    Attributes
    ----------
    bytes : float or None
        None: unknown (no memory check).
    text : str
        E.g. "this machine has 22.8 GiB available and a run may use 3/4 of it (17.1 GiB)".
    """

    bytes: float | None
    text: str

    @property
    def short(self):
        """The budget in a few words ("the memory budget of 17.1 GiB")."""
        return "an unknown memory budget" if self.bytes is None else f"the memory budget of {format_bytes(self.bytes)}"


def memory_budget(environ=None, **where):
    """The run's memory budget: :data:`MEMORY_ENV` if set, else :data:`MEMORY_SHARE` of what is available.

    Parameters
    ----------
    environ : Mapping, optional
        Environment (default ``os.environ``).
    **where
        ``meminfo``, ``cgroup`` paths passed to :func:`available_memory_bytes`.

    Returns
    -------
    Budget

    Raises
    ------
    InputError
        When :data:`MEMORY_ENV` is not a positive number of GiB.
    """
    environ = os.environ if environ is None else environ
    given = environ.get(MEMORY_ENV, "").strip()
    if given:
        try:
            gib = float(given)
        except ValueError:
            gib = float("nan")
        if not (math.isfinite(gib) and gib > 0):
            raise InputError(MEMORY_ENV, f"expected a positive number of GiB, got {given!r}")
        return Budget(gib * _GIB, f"the memory budget is {format_bytes(gib * _GIB)} ({MEMORY_ENV})")
    available = available_memory_bytes(**where)
    if available is None:
        return Budget(None, "the available memory is unknown")
    budget = MEMORY_SHARE * available
    return Budget(budget, f"this machine has {format_bytes(available)} available and a run may use 3/4 of it "
                          f"({format_bytes(budget)})")


def _parallel_tasks(config):
    """Block tasks at once in this machine: worker threads (local), the 2 local Dask workers, or 1
    (a remote cluster, whose workers' memory this machine cannot see: its own task is the proxy)."""
    ex = config.execution
    if ex.backend == "local":
        return ex.max_workers
    return 1 if ex.address else 2


def _pair_bytes(n_ims):
    return PAIR_BYTES + PAIR_IM_BYTES * n_ims


def rupture_limit(config, n_ims, budget):
    """Most ruptures one source-model file may have: each must be built and its ground motion
    computed at one site per hazard task.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    n_ims : int
        IMs computed.
    budget : Budget

    Returns
    -------
    quakefolio.pipeline.io.source_model.RuptureLimit or None
        None when the budget is unknown.
    """
    if budget.bytes is None:
        return None
    tasks = _parallel_tasks(config)
    per = RUPTURE_BUILD_BYTES + tasks * _pair_bytes(n_ims)
    n = int(budget.bytes // per)
    at_once = f" in each of {tasks} tasks at once" if tasks > 1 else ""
    return RuptureLimit(n, f"at most {n:,} ruptures fit (about {per:,} bytes each: built, and their ground motion "
                           f"at one site{at_once}); {budget.text}")


# ----------------------------------------------------------------------------- estimate

@dataclass(frozen=True)
class Term:
    """One part of a stage's peak memory and the config key that sets it.

    Attributes
    ----------
    bytes : float
        Memory [bytes].
    key : str
        Config column (``section.key``) to name when this term makes the stage too large.
    subject : str
        The key's value and what it makes, e.g. "years = 50,000,000 (about 3.5e+06 events)".
    what : str
        The arrays, e.g. "year-loss and EP-curve tables".
    value : float or None
        The key's value in effect (e.g. the sites of a block, at most the sites there are)
        when the term grows in proportion to it: then the largest value that fits is named.
    floor : float
        Smallest useful value of the key.
    otherwise : str
        Advice when no value of the key fits.
    """

    bytes: float
    key: str
    subject: str
    what: str
    value: float | None = None
    floor: float = 1
    otherwise: str = ""

    def fits(self, room):
        """Largest value of the key whose term fits in ``room``.

        Parameters
        ----------
        room : float
            Memory left for this term [bytes].

        Returns
        -------
        int or None
            Rounded down to two significant digits; None when no value fits or the term does
            not grow in proportion to the key.
        """
        if self.value is None or room <= 0 or self.bytes <= 0:
            return None
        n = math.floor(self.value * room / self.bytes)
        if n >= 100:  # two significant digits, rounded down: the estimate is not exact to the unit
            scale = 10 ** (len(str(n)) - 2)
            n = n // scale * scale
        return n if n >= self.floor else None


@dataclass(frozen=True)
class StageSize:
    """Peak memory of one stage as the sum of its terms.

    Attributes
    ----------
    name : str
        E.g. "hazard stage" (read as "for the <name>").
    terms : tuple of Term
    """

    name: str
    terms: tuple

    @property
    def bytes(self):
        """Peak [bytes]."""
        return float(sum(t.bytes for t in self.terms))

    def largest(self):
        """The term with the most memory.

        Returns
        -------
        Term
        """
        return max(self.terms, key=lambda t: t.bytes)


@dataclass(frozen=True)
class WorkSize:
    """The estimated size of a run's work.

    Attributes
    ----------
    n_ruptures : tuple of int
        Per source-model branch (empty in ingest mode).
    n_sites : int
        Hazard sites.
    n_pairs : int
        Unique (site, class) pairs.
    n_years : int
        Simulated years (0: no event-based stage).
    n_events : float
        Expected number of events.
    stages : tuple of StageSize
    budget : Budget
    """

    n_ruptures: tuple
    n_sites: int
    n_pairs: int
    n_years: int
    n_events: float
    stages: tuple
    budget: Budget

    @property
    def peak(self):
        """The stage with the largest peak (StageSize)."""
        return max(self.stages, key=lambda s: s.bytes)

    def summary(self):
        """One line for ``check``: ruptures, sites x ruptures, pairs, years and events, peak memory.

        Returns
        -------
        str
        """
        parts = []
        if self.n_ruptures:
            parts.append(f"{sum(self.n_ruptures):,} ruptures in {len(self.n_ruptures)} source model"
                         f"{'s' if len(self.n_ruptures) > 1 else ''}")
            parts.append(f"{self.n_sites:,} sites x {max(self.n_ruptures):,} ruptures = "
                         f"{self.n_sites * max(self.n_ruptures):,} (site, rupture) pairs per model")
        parts.append(f"{self.n_pairs:,} (site, class) pairs")
        if self.n_years:
            parts.append(f"{self.n_years:,} years, about {self.n_events:,.0f} events")
        peak = self.peak
        of = f" of {format_bytes(self.budget.bytes)}" if self.budget.bytes is not None else " (available memory unknown)"
        parts.append(f"peak memory about {format_bytes(peak.bytes)} ({peak.name}){of}")
        return "size: " + "; ".join(parts)


@dataclass(frozen=True)
class _Dims:
    """The numbers the estimate is made of."""

    assets: int
    sites: int
    pairs: int
    ims: int
    levels: int
    tasks: int
    ruptures: tuple  # per source branch
    rates: tuple  # total rupture rate per source branch [1/yr]
    pieces: tuple = ()  # pieces of the ruptures on bent faults, per source branch


def _dims(inputs, n_pairs):
    model = inputs.hazard_model
    cfg = inputs.config
    if model is None:
        levels = max((lv.shape[1] for lv, _ in inputs.hazard.curves.values()), default=1)
        ims, ruptures, rates = len(inputs.hazard.curves), (), ()
    else:
        levels, ims = len(model.levels_g), len(model.ims)
        ruptures = tuple(len(src.ruptures) for _, _, src in model.source_branches)
        rates = tuple(src.ruptures.total_rate for _, _, src in model.source_branches)
        pieces = tuple(src.ruptures.piece_rupture.size for _, _, src in model.source_branches)
    return _Dims(len(inputs.exposure), len(inputs.hazard.site_id), n_pairs, ims, levels, _parallel_tasks(cfg),
                 ruptures, rates, pieces if model is not None else ())


def _ruptures_term(d, copies=1):
    return Term(copies * (sum(d.ruptures) * RUPTURE_BYTES + sum(d.pieces) * PIECE_BYTES), "hazard.source_models",
                f"{sum(d.ruptures):,} ruptures", "the rupture sets",
                otherwise="use fewer ruptures (a larger rupture_step_km or spacing_km in the source models)")


def _curves_term(config, d):
    """Hazard curves of every branch, statistics and disaggregation of every site (compute mode)."""
    hz = config.hazard
    if hz.mode != "compute":
        return Term(0.0, "hazard.curves_file", "", "")
    n_branch = len(hz.source_models) * len(hz.gmm_branches)
    n_part = len(hz.source_models) * (len(hz.gmm_branches) + sum(len(r) for r in hz.region_gmm_branches.values()))
    per_site = 8 * d.ims * d.levels * (n_branch + 2 * n_part + 2 + len(hz.fractiles))
    if hz.disaggregation:
        per_site += 8 * 2 * d.ims * len(hz.return_periods_yr) * _DISAGG_BINS
    return Term(d.sites * per_site, "hazard.site_spacing_km", f"{d.sites:,} hazard sites",
                "hazard curves of every branch, statistics and disaggregation of every site",
                otherwise="snap assets to fewer sites with a larger [hazard] site_spacing_km"
                          + (", or set disaggregation = false" if hz.disaggregation else ""))


def _hazard_stage(config, d):
    ex = config.execution
    block = min(ex.site_block_size, d.sites)
    r_max = max(d.ruptures)
    per_block = d.tasks * block * r_max * _pair_bytes(d.ims)
    at_once = f", {d.tasks} tasks at once" if d.tasks > 1 else ""
    task = Term(per_block, "execution.site_block_size",
                f"site_block_size = {ex.site_block_size:,} ({block:,} sites x {r_max:,} ruptures per task{at_once})",
                "the (site, rupture) pairs of the hazard tasks", value=block,
                otherwise="one site with every rupture of the largest source model does not fit either: use fewer "
                          "ruptures (a larger rupture_step_km or spacing_km in the source models)")
    return StageSize("hazard stage", (_ruptures_term(d), _curves_term(config, d), task))


def check_hazard_work(config, n_ruptures, n_sites, n_ims, budget):
    """Refuse, before any rupture is built, a hazard stage that cannot fit the budget.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    n_ruptures : sequence of int
        Ruptures of each source-model branch, counted
        (:func:`quakefolio.pipeline.io.source_model.count_source_model`).
    n_sites : int
        Hazard sites.
    n_ims : int
        IMs computed.
    budget : Budget

    Raises
    ------
    InputError
        Naming the key of the stage's largest term (usually ``[execution] site_block_size``).
    """
    d = _Dims(0, n_sites, 0, n_ims, len(config.hazard.im_levels_g), _parallel_tasks(config), tuple(n_ruptures), ())
    _refuse_stages(config, (_hazard_stage(config, d),), budget)


def _damage_stage(inputs, d):
    cfg = inputs.config
    codes = set(inputs.exposure.building_class.unique())
    # a vulnerability class: the bins of its integral (about SUB_BINS per hazard and table level)
    states = max(len(inputs.library[c].medians) if inputs.library[c].has_damage_states
                 else SUB_BINS * (len(inputs.library[c].levels) + d.levels) for c in codes)
    ratios = len(cfg.output.loss_curve_ratios)
    model = inputs.hazard_model
    branches = 1 + (len(model.combinations) if model is not None and cfg.hazard.propagate_branches else 0)
    block = min(cfg.execution.block_size, max(d.pairs, 1))
    per_block = d.tasks * block * (d.levels + ratios) * states * 8 * 4 * branches
    task = Term(per_block, "execution.block_size", f"block_size = {cfg.execution.block_size:,} "
                f"({block:,} (site, class) pairs per task)", "the damage-state rates of a block of pairs",
                value=block)
    assets = Term(d.assets * (ratios + 4) * ASSET_BYTES, "exposure.file", f"{d.assets:,} assets",
                  "the asset damage, loss and loss-curve tables", otherwise="split the portfolio into several runs")
    terms = (task, assets, _curves_term(cfg, d))
    return StageSize("damage and loss stage", terms + ((_ruptures_term(d),) if d.ruptures else ()))


def _event_rates(inputs, d):
    """Source branches of the event set with their shares of the years, and the expected events."""
    model = inputs.hazard_model
    wanted = inputs.config.portfolio.source_branch
    ids = [b for b, _, _ in model.source_branches]
    if wanted in ids:
        shares = [1.0 if b == wanted else 0.0 for b in ids]
    else:
        w = np.array([wt for _, wt, _ in model.source_branches])
        shares = list(w / w.sum())
    years = inputs.config.portfolio.years
    return shares, years * float(np.dot(shares, d.rates))


def _distinct_ruptures(inputs, shares, n_draws):
    r"""Expected distinct ruptures among ``n_draws`` events: :math:`\sum_r 1 - e^{-n p_r}` (Poisson)."""
    p = [share * src.ruptures.rate for share, (_, _, src) in zip(shares, inputs.hazard_model.source_branches) if share]
    rates = np.concatenate(p) if p else np.zeros(0)
    total = rates.sum()
    if total <= 0:
        return 0.0
    return float(np.sum(-np.expm1(-n_draws * rates / total)))


def _years_term(inputs, d, years, events, tables):
    """Memory growing with the simulated years: the event set and per-block sums (and, with
    ``tables``, the year and event tables)."""
    n_blocks = math.ceil(events / EVENT_BLOCK_SIZE)
    per_chunk = max(1, math.ceil(inputs.config.execution.event_block_size / EVENT_BLOCK_SIZE))
    n_chunks = math.ceil(n_blocks / per_chunk)
    kept = n_blocks * d.assets * 32 + n_chunks * d.ims * d.sites * d.levels * 8 + years * 24 + events * 60
    if tables:
        kept += years * YEAR_BYTES + events * EVENT_BYTES
    return Term(kept, "portfolio.years", f"years = {years:,} (about {events:,.0f} events)",
                "the event set, year and event losses, EP curves and per-block asset sums" if tables else
                "the event set and per-block asset sums", value=years,
                otherwise="fewer events: fewer years, or check the source models' rates")


def _breakdown_term(inputs, years, events):
    """The per-event and per-year losses of every group of ``[output] breakdown_columns`` (ground-up and net)."""
    columns = inputs.config.output.breakdown_columns
    groups = sum(int(inputs.exposure[c].nunique()) for c in columns if c in inputs.exposure.columns)
    largest = max([int(inputs.exposure[c].nunique()) for c in columns if c in inputs.exposure.columns] or [0])
    return Term(16.0 * events * groups + 32.0 * years * largest, "output.breakdown_columns",
                f"breakdown_columns = {list(columns)} ({groups:,} groups)",
                "the event and year losses of every breakdown group",
                otherwise="fewer breakdown columns or columns of fewer groups, or fewer years")


def _task_term(inputs, d, shares, events):
    """Ground motions and losses of one chunk of events, times the tasks at once."""
    cfg = inputs.config
    ev_task = min(max(events, 1.0), math.ceil(cfg.execution.event_block_size / EVENT_BLOCK_SIZE) * EVENT_BLOCK_SIZE)
    distinct = _distinct_ruptures(inputs, shares, ev_task)
    n_gmm = len(inputs.hazard_model.gmm_branches)
    per_task = (d.sites * distinct * (_pair_bytes(d.ims) + 24 * n_gmm * d.ims)
                + ev_task * (d.ims * d.sites * 48 + d.assets * 24))
    at_once = f", {d.tasks} tasks at once" if d.tasks > 1 else ""
    return Term(d.tasks * per_task, "execution.event_block_size",
                f"event_block_size = {cfg.execution.event_block_size:,} ({ev_task:,.0f} events x {d.sites:,} sites "
                f"per task{at_once})", "the ground motions and losses of a chunk of events",
                value=ev_task, floor=EVENT_BLOCK_SIZE,
                otherwise="fewer hazard sites (a larger [hazard] site_spacing_km) or assets")


def _unique_sites(inputs):
    return len(np.unique(np.stack([inputs.hazard.lon, inputs.hazard.lat], axis=1), axis=0))


def _event_stages(inputs, d):
    """Per-task and table peaks of the event-based stage, the years and the expected events."""
    cfg = inputs.config
    shares, events = _event_rates(inputs, d)
    years = cfg.portfolio.years
    n_u = _unique_sites(inputs)
    fields = Term(8.0 * n_u * n_u * (2 + d.ims) if cfg.portfolio.spatial_correlation else 0.0,
                  "portfolio.spatial_correlation", f"spatial_correlation = true with {n_u:,} sites",
                  "the correlation matrices of the ground-motion fields",
                  otherwise="snap assets to fewer sites (a larger [hazard] site_spacing_km)")
    kept = (_ruptures_term(d, copies=2), _curves_term(cfg, d))
    per_task = StageSize("event-based losses per task",
                         kept + (_years_term(inputs, d, years, events, False), fields,
                                 _task_term(inputs, d, shares, events)))
    tables = StageSize("event-based tables", kept + (_years_term(inputs, d, years, events, True),
                                                     _breakdown_term(inputs, years, events)))
    return (per_task, tables), years, events


def estimate_work(inputs, n_pairs, budget):
    """Estimate the run's work: counts and the peak memory of every stage (module notes).

    Parameters
    ----------
    inputs : RunInputs
        Validated inputs (compute mode: with the source models, before the hazard stage).
    n_pairs : int
        Unique (site, class) pairs (:func:`quakefolio.pipeline.stages.inputs.unique_pairs`).
    budget : Budget

    Returns
    -------
    WorkSize
    """
    d = _dims(inputs, n_pairs)
    stages = [_damage_stage(inputs, d)]
    years = events = 0
    if inputs.hazard_model is not None:
        stages.insert(0, _hazard_stage(inputs.config, d))
        if inputs.config.portfolio.event_based:
            more, years, events = _event_stages(inputs, d)
            stages.extend(more)
    return WorkSize(d.ruptures, d.sites, n_pairs, years, events, tuple(stages), budget)


# ----------------------------------------------------------------------------- refusal

def _refuse(config, key, message):
    """InputError at ``key`` (``section.key``) of the config file."""
    section, name = key.split(".", 1)
    try:
        text = read_toml(config.path)[0]
    except (OSError, InputError):
        text = ""
    return InputError(config.path, message, row=locate_toml_line(text, (section,), name), column=key)


def _check_field_sites(inputs):
    cfg = inputs.config
    if inputs.hazard_model is None or not cfg.portfolio.event_based or not cfg.portfolio.spatial_correlation:
        return
    n_u = _unique_sites(inputs)
    if n_u > EIGEN_MAX_SITES:
        raise _refuse(cfg, "hazard.site_spacing_km",
                      f"{n_u:,} hazard sites exceed the {EIGEN_MAX_SITES:,} the spatially correlated ground-motion "
                      "fields accept (an n x n correlation matrix and its eigen-decomposition); snap assets to fewer "
                      "sites with a larger site_spacing_km, or set [portfolio] spatial_correlation = false")


def check_work(inputs, work):
    """Refuse a run whose largest stage does not fit the budget, naming the key of its largest term.

    Parameters
    ----------
    inputs : RunInputs
    work : WorkSize
        From :func:`estimate_work`.

    Raises
    ------
    InputError
        One line: ``<config>:<row>: column '<key>': <value> need about <X> for the <stage>
        (<arrays>: <Y>); <budget>; <what would fit>``.
    """
    _check_field_sites(inputs)
    _refuse_stages(inputs.config, work.stages, work.budget)


def _refuse_stages(config, stages, budget):
    """InputError for the largest stage over the budget, naming the key of its largest term; the
    advice (the largest value of that key that fits) holds for every stage over the budget."""
    if budget.bytes is None:
        return
    over = sorted((s for s in stages if s.bytes > budget.bytes), key=lambda s: -s.bytes)
    if not over:
        return
    stage = over[0]
    term = stage.largest()
    fits = [t.fits(budget.bytes - (s.bytes - t.bytes)) for s in over for t in s.terms if t.key == term.key]
    advice = term.otherwise if None in fits else f"at most {term.key.split('.')[-1]} = {min(fits):,} would fit"
    raise _refuse(config, term.key,
                  f"{term.subject} need about {format_bytes(stage.bytes)} for the {stage.name} ({term.what}: "
                  f"{format_bytes(term.bytes)}); {budget.text}" + (f"; {advice}" if advice else ""))
