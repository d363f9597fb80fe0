r"""Poisson stochastic event sets and the random-number streams of the event-based stage.

Event set
---------
Each rupture :math:`r` of a rupture set occurs as a homogeneous Poisson process with
annual rate :math:`\nu_r` (the same rates as the classical hazard integral). Over
:math:`N` simulated years the number of occurrences is :math:`K_r \sim
\mathrm{Poisson}(\nu_r N)`, and given :math:`K_r` the occurrence times are independent
and uniform over the :math:`N` years. Drawing :math:`K_r` and then a uniform year for
each occurrence is therefore exactly equivalent to drawing independent
:math:`\mathrm{Poisson}(\nu_r)` counts in every year (conditional uniformity of Poisson
arrival times; e.g. Ross 2014, ch. 5, chapter from memory), but costs memory proportional
to the number of events, not to :math:`N \times` the number of ruptures.

Random-number streams
---------------------
Every random quantity of the stage comes from a :class:`numpy.random.Generator` seeded
by a :class:`numpy.random.SeedSequence` built from the user's seed, a fixed *stream tag*
naming the quantity, and (for per-event quantities) a block index:

* the event set: ``SeedSequence([seed, STREAM_EVENT_SET])`` (:func:`stream_rng`);
* the ground-motion model of each event (drawn by logic-tree branch weight):
  ``SeedSequence([seed, STREAM_GMM_CHOICE])`` (:func:`stream_rng`);
* ground-motion residuals of event block ``b``:
  ``SeedSequence([seed, STREAM_GROUND_MOTION, b])`` (:func:`block_rng`);
* sampled damage states and loss ratios of event block ``b`` and class entry ``k`` (one
  generator per block and class): ``SeedSequence([seed, STREAM_DAMAGE, b * 4096 + k])``
  (:func:`damage_block_rng`, packing :func:`class_block_index`);
* :data:`STREAM_LOSS_RATIO` is reserved for loss ratios drawn on their own;
* the logic-tree branch combination of each simulated year (whole logic tree):
  ``SeedSequence([seed, STREAM_BRANCH_YEARS])`` (:func:`stream_rng`, :func:`branch_years`);
* the occurrences of source-model branch ``s`` in its years (whole logic tree):
  ``SeedSequence([seed, STREAM_BRANCH_EVENTS, s])`` (:func:`branch_rng`,
  :func:`logic_tree_event_set`).
* group factors of correlated secondary uncertainty (damage state and loss ratio shared by
  the assets of a group in an event) of event block ``b`` and group ``g``:
  ``SeedSequence([seed, STREAM_GROUP_FACTOR, b, g])`` (:func:`group_factor_rng`; one
  generator per block and group, so adding a group leaves the others' factors unchanged).
* the period of the day of each event (time-of-day occupancy):
  ``SeedSequence([seed, STREAM_OCCUPANCY])`` (:func:`stream_rng`).
* station-conditioned residuals of a scenario rupture ``r``, ground-motion model ``g`` and IM
  ``k``: ``SeedSequence([seed, STREAM_CONDITIONED, r, g, k])`` (:func:`conditioned_rng`).
* the ground-motion model of each event of a tectonic region other than active crustal
  (drawn by the region's branch weights, one uniform number per event):
  ``SeedSequence([seed, STREAM_REGION_GMM_CHOICE])`` (:func:`stream_rng`).
* the logic-tree combinations of a seeded sample for the hazard fractiles (only above
  ``[hazard] fractile_combinations_max``): ``SeedSequence([seed, STREAM_FRACTILE_SAMPLE])``
  (:func:`stream_rng`, :func:`quakefolio.core.combinations.tree_combinations`).

Every stream tag of the project is defined here and nowhere else; the tags are part of
the reproducibility contract (changing one changes the draws of its quantity).

Whole logic tree
----------------
Epistemic uncertainty enters by simulated year: every year is one realisation of one
branch combination (source-model branch x ground-motion branch) of the logic tree, with
all of that year's events drawn from the combination's ruptures and ground-motion model.
The number of years of combination :math:`c` is the weight apportioned to whole years,
:math:`N_c = w_c N` rounded by largest remainders (:func:`allocate_years`), and which years
they are is a uniformly random permutation (:func:`branch_years`), so the year axis stays
exchangeable. The pooled years are then a stratified sample of the mixture whose annual
loss distribution is :math:`F = \sum_c w_c F_c`: at every loss :math:`x` the pooled
empirical exceedance probability is exactly :math:`\sum_c (N_c/N)\,\hat P_c(L > x)`, the
weighted mean of the branch exceedance curves (the mean-hazard convention applied to the
EP curve), and each combination's own years give its own EP curve. Stratifying rather than
drawing each year's branch independently reproduces the weights to within :math:`1/N`
and removes the between-branch term from the sampling variance of the pooled AAL, whose
variance is then :math:`\sum_c N_c \lambda_c E_c[L^2] / N^2`, estimated without bias by the
compound-Poisson form :math:`\sum_e L_e^2 / N^2`.
One event set per branch combined by weight was the alternative; it multiplies the
simulated years (and the ground-motion fields) by the number of combinations, while the
year assignment costs the same per simulated year as a single-branch set.

Events are numbered in a fixed order and cut into blocks of :data:`EVENT_BLOCK_SIZE`
consecutive events (the last block may be shorter). A block is the unit of random
numbers: a task that processes any set of *whole* blocks draws, for each block, from
that block's own generator. **Results are therefore deterministic for a seed whatever
the chunking**: grouping blocks into tasks differently, or running tasks in another
order or on other workers, gives identical draws.

References
----------
Ross, S. M. (2014). Introduction to Probability Models, 11th ed. Academic Press.
"""
from __future__ import annotations

import numbers
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "EVENT_BLOCK_SIZE",
    "STREAM_EVENT_SET",
    "STREAM_GROUND_MOTION",
    "STREAM_DAMAGE",
    "STREAM_LOSS_RATIO",
    "STREAM_GMM_CHOICE",
    "STREAM_BRANCH_YEARS",
    "STREAM_BRANCH_EVENTS",
    "STREAM_GROUP_FACTOR",
    "STREAM_OCCUPANCY",
    "STREAM_CONDITIONED",
    "conditioned_rng",
    "STREAM_REGION_GMM_CHOICE",
    "STREAM_FRACTILE_SAMPLE",
    "MAX_CLASS_ENTRIES",
    "EventSet",
    "stochastic_event_set",
    "event_blocks",
    "block_rng",
    "stream_rng",
    "class_block_index",
    "damage_block_rng",
    "group_factor_rng",
    "check_seed",
    "allocate_years",
    "branch_years",
    "branch_rng",
    "logic_tree_event_set",
]

#: Events per random-number block (see module notes). Changing it changes every sampled
#: ground-motion field, so it is part of the reproducibility contract. 256 events x 2000
#: sites x 3 IMs of float64 residuals is 12 MB: large enough for efficient matrix
#: products, small enough to keep per-task memory low.
EVENT_BLOCK_SIZE = 256

#: Stream tag of the event set (occurrence counts and years).
STREAM_EVENT_SET = 1
#: Stream tag of the ground-motion residuals (between- and within-event).
STREAM_GROUND_MOTION = 2
#: Stream tag reserved for sampled damage states.
STREAM_DAMAGE = 3
#: Stream tag reserved for sampled loss ratios.
STREAM_LOSS_RATIO = 4
#: Stream tag of the group factors of correlated secondary uncertainty (per block and group).
STREAM_GROUP_FACTOR = 5
#: Stream tag of the per-event ground-motion-model draw (one generator for the event set).
STREAM_GMM_CHOICE = 11
#: Stream tag of the branch combination of each simulated year (whole logic tree).
STREAM_BRANCH_YEARS = 12
#: Stream tag of the occurrences of one source-model branch in its years (whole logic tree).
STREAM_BRANCH_EVENTS = 13
#: Stream tag of the per-event period of the day (time-of-day occupancy; one generator for the event set).
STREAM_OCCUPANCY = 17
#: Stream tag of station-conditioned scenario residuals (per rupture, ground-motion model and IM).
STREAM_CONDITIONED = 19
#: Stream tag of the ground-motion model of events of tectonic regions other than active crustal
#: (one uniform number per event of the set, drawn by the region's branch weights).
STREAM_REGION_GMM_CHOICE = 18
#: Stream tag of the sampled logic-tree combinations of the hazard fractiles (one generator per run).
STREAM_FRACTILE_SAMPLE = 20
#: Class entries per event block in the packed index of :func:`class_block_index`.
MAX_CLASS_ENTRIES = 4096

#: Streams drawn per event block (:func:`block_rng`).
_STREAMS = (STREAM_EVENT_SET, STREAM_GROUND_MOTION, STREAM_DAMAGE, STREAM_LOSS_RATIO)
#: Streams drawn once per event set (:func:`stream_rng`).
_WHOLE_SET_STREAMS = (STREAM_EVENT_SET, STREAM_GMM_CHOICE, STREAM_BRANCH_YEARS, STREAM_OCCUPANCY,
                      STREAM_REGION_GMM_CHOICE, STREAM_FRACTILE_SAMPLE)


def check_seed(seed) -> int:
    """Return ``seed`` as a Python int after checking it is an integer >= 0.

    Raises
    ------
    ValueError
        If ``seed`` is not an integer (bools are refused) or is negative.
    """
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, numbers.Integral):
        raise ValueError(f"seed must be a non-negative integer; got {seed!r}")
    seed = int(seed)
    if seed < 0:
        raise ValueError(f"seed must be a non-negative integer; got {seed}")
    return seed


def _check_positive_int(name: str, value) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral) or int(value) < 1:
        raise ValueError(f"{name} must be a positive integer; got {value!r}")
    return int(value)


def _readonly(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


@dataclass(frozen=True, eq=False)
class EventSet:
    """Simulated earthquake occurrences as a structure of arrays (read-only, length n).

    Events are sorted by year, then rupture index, then occurrence.

    Attributes
    ----------
    event_id : ndarray of int64, shape (n,)
        1, 2, ..., n in the sorted order.
    year : ndarray of int32, shape (n,)
        Simulated year of occurrence, in 1..``n_years``.
    rupture : ndarray of int64, shape (n,)
        Index into the rupture set whose rates generated the events.
    n_years : int
        Number of simulated years N [yr].
    """

    event_id: NDArray[np.int64]
    year: NDArray[np.int32]
    rupture: NDArray[np.int64]
    n_years: int

    def __post_init__(self):
        n = self.event_id.shape
        if self.event_id.ndim != 1 or self.year.shape != n or self.rupture.shape != n:
            raise ValueError(
                "EventSet: event_id, year and rupture must be 1-D arrays of one length; got shapes "
                f"{self.event_id.shape}, {self.year.shape}, {self.rupture.shape}"
            )

    @property
    def n_events(self) -> int:
        """Number of events n."""
        return int(self.event_id.size)

    def __len__(self) -> int:
        return self.n_events


def stochastic_event_set(rupture_rates: ArrayLike, n_years: int, seed: int) -> EventSet:
    r"""Poisson occurrences of every rupture over ``n_years`` simulated years.

    Parameters
    ----------
    rupture_rates : array_like, shape (n_ruptures,) [1/yr]
        Annual rate of each rupture, finite and >= 0 (e.g. ``RuptureSet.rate``).
    n_years : int
        Number of simulated years N, >= 1.
    seed : int
        Non-negative seed; the generator is ``SeedSequence([seed, STREAM_EVENT_SET])``.

    Returns
    -------
    EventSet
        Events sorted by year, then rupture, then occurrence; ``event_id`` 1..n.

    Notes
    -----
    :math:`K_r \sim \mathrm{Poisson}(\nu_r N)` occurrences of rupture :math:`r`, each in
    a year drawn uniformly from 1..N: equivalent to independent per-year
    :math:`\mathrm{Poisson}(\nu_r)` counts (module notes). Memory and time are
    O(n_ruptures + n_events) (plus an O(n_events log n_events) sort); N itself costs
    nothing. The result is deterministic for a given seed, rates and N.

    Raises
    ------
    ValueError
        If the rates are not a 1-D array of finite non-negative numbers, ``n_years`` is not
        a positive integer, or ``seed`` is not a non-negative integer.
    """
    n_years = _check_positive_int("n_years", n_years)
    if n_years > np.iinfo(np.int32).max:
        raise ValueError(f"n_years must be at most {np.iinfo(np.int32).max}; got {n_years}")
    seed = check_seed(seed)
    try:
        rates = np.asarray(rupture_rates, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"rupture_rates must be numeric array_like; got {rupture_rates!r}") from exc
    if rates.ndim != 1:
        raise ValueError(f"rupture_rates must be 1-D (one rate per rupture); got shape {rates.shape}")
    bad = ~np.isfinite(rates) | (rates < 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(f"rupture_rates must be finite and >= 0 [1/yr]; got {rates[i]!r} at index {i}")

    rng = stream_rng(seed, STREAM_EVENT_SET)
    counts = rng.poisson(rates * n_years)  # one draw per rupture, in rupture order
    rupture = np.repeat(np.arange(rates.size, dtype=np.int64), counts)
    year = rng.integers(1, n_years, size=rupture.size, dtype=np.int32, endpoint=True)
    order = np.lexsort((rupture, year))  # stable: by year, then rupture, then occurrence
    rupture = rupture[order]
    year = year[order]
    event_id = np.arange(1, rupture.size + 1, dtype=np.int64)
    return EventSet(_readonly(event_id), _readonly(year), _readonly(rupture), n_years)


def event_blocks(n_events: int, block_size: int = EVENT_BLOCK_SIZE) -> NDArray[np.int64]:
    """Random-number blocks of an event set: ``[start, stop)`` rows of event positions.

    Parameters
    ----------
    n_events : int
        Number of events n (>= 0), positions 0..n-1 in event-set order
        (position = ``event_id - 1``).
    block_size : int
        Events per block (default :data:`EVENT_BLOCK_SIZE`); part of the reproducibility
        contract, so callers should keep the default.

    Returns
    -------
    ndarray of int64, shape (n_blocks, 2)
        Row ``b`` is ``[b * block_size, min((b + 1) * block_size, n))``: block ``b``; only the
        last block can be shorter. ``n_blocks = ceil(n / block_size)``.
    """
    if isinstance(n_events, (bool, np.bool_)) or not isinstance(n_events, numbers.Integral) or n_events < 0:
        raise ValueError(f"n_events must be a non-negative integer; got {n_events!r}")
    block_size = _check_positive_int("block_size", block_size)
    starts = np.arange(0, int(n_events), block_size, dtype=np.int64)
    stops = np.minimum(starts + block_size, int(n_events))
    return np.stack([starts, stops], axis=1) if starts.size else np.empty((0, 2), dtype=np.int64)


def block_rng(seed: int, block_index: int, stream: int = STREAM_GROUND_MOTION) -> np.random.Generator:
    """The generator of one event block: ``SeedSequence([seed, stream, block_index])``.

    Parameters
    ----------
    seed : int
        The run's non-negative seed.
    block_index : int
        Global index ``b`` >= 0 of the block (row of :func:`event_blocks`).
    stream : int
        Stream tag naming the quantity drawn (default :data:`STREAM_GROUND_MOTION`).

    Returns
    -------
    numpy.random.Generator
        A PCG64 generator independent of every other (seed, stream, block) triple.
    """
    seed = check_seed(seed)
    if isinstance(block_index, (bool, np.bool_)) or not isinstance(block_index, numbers.Integral) or block_index < 0:
        raise ValueError(f"block_index must be a non-negative integer; got {block_index!r}")
    if stream not in _STREAMS:
        raise ValueError(f"stream must be one of the stream tags {_STREAMS}; got {stream!r}")
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, int(stream), int(block_index)])))


def stream_rng(seed: int, stream: int) -> np.random.Generator:
    """The generator of a quantity drawn once per event set: ``SeedSequence([seed, stream])``.

    Parameters
    ----------
    seed : int
        The run's non-negative seed.
    stream : int
        :data:`STREAM_EVENT_SET`, :data:`STREAM_GMM_CHOICE`, :data:`STREAM_BRANCH_YEARS`,
        :data:`STREAM_OCCUPANCY`, :data:`STREAM_REGION_GMM_CHOICE` or :data:`STREAM_FRACTILE_SAMPLE`.

    Returns
    -------
    numpy.random.Generator
        A PCG64 generator (as ``numpy.random.default_rng`` builds from the same sequence).
    """
    seed = check_seed(seed)
    if stream not in _WHOLE_SET_STREAMS:
        raise ValueError(f"stream must be one of the stream tags {_WHOLE_SET_STREAMS}; got {stream!r}")
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, int(stream)])))


def class_block_index(block_index: int, class_entry: int) -> int:
    """Packed index ``block_index * MAX_CLASS_ENTRIES + class_entry`` of one (event block, class) pair.

    Parameters
    ----------
    block_index : int
        Global event block ``b`` >= 0 (row of :func:`event_blocks`).
    class_entry : int
        Position ``k`` of the building-class entry in the event stage's class list,
        0 <= k < :data:`MAX_CLASS_ENTRIES`.

    Returns
    -------
    int
        ``b * 4096 + k``: distinct for every (b, k) pair, so each pair has its own generator.
    """
    if isinstance(class_entry, (bool, np.bool_)) or not isinstance(class_entry, numbers.Integral) \
            or not 0 <= class_entry < MAX_CLASS_ENTRIES:
        raise ValueError(f"class_entry must be an integer in [0, {MAX_CLASS_ENTRIES}); got {class_entry!r}")
    return int(block_index) * MAX_CLASS_ENTRIES + int(class_entry)


def damage_block_rng(seed: int, block_index: int, class_entry: int) -> np.random.Generator:
    """The generator of sampled damage of one event block and class entry.

    Parameters
    ----------
    seed : int
        The run's non-negative seed.
    block_index : int
        Global event block ``b`` >= 0.
    class_entry : int
        Position ``k`` of the class entry (see :func:`class_block_index`).

    Returns
    -------
    numpy.random.Generator
        ``block_rng(seed, class_block_index(b, k), stream=STREAM_DAMAGE)``: identical
        whatever the chunking of whole blocks into tasks.
    """
    return block_rng(seed, class_block_index(block_index, class_entry), stream=STREAM_DAMAGE)


# --------------------------------------------------------------------------- whole logic tree


def allocate_years(weights: ArrayLike, n_years: int) -> NDArray[np.int64]:
    r"""Whole simulated years per branch combination: ``weights * n_years`` by largest remainders.

    Parameters
    ----------
    weights : array_like, shape (n_combinations,) [-]
        Logic-tree weights, >= 0, summing to 1 (1e-9).
    n_years : int
        Number of simulated years N, >= 1.

    Returns
    -------
    ndarray of int64, shape (n_combinations,)
        :math:`N_c`, summing to N with :math:`|N_c - w_c N| < 1`: the floors
        :math:`\lfloor w_c N \rfloor`, then one more year to each of the combinations
        with the largest remainders (ties to the lower index).

    Notes
    -----
    Largest-remainder (Hamilton) apportionment (common practice). A combination whose
    weight times N is below 1 may get no year.
    """
    n_years = _check_positive_int("n_years", n_years)
    w = np.asarray(weights, dtype=np.float64)
    if w.ndim != 1 or w.size == 0 or not np.all(np.isfinite(w)) or np.any(w < 0) or abs(w.sum() - 1.0) > 1e-9:
        raise ValueError(f"weights must be a 1-D array of non-negative numbers summing to 1; got {w.tolist()}")
    exact = w * n_years
    counts = np.floor(exact).astype(np.int64)
    short = n_years - int(counts.sum())
    order = np.argsort(-(exact - counts), kind="stable")
    counts[order[:short]] += 1
    return counts


def branch_years(weights: ArrayLike, n_years: int, seed: int) -> NDArray[np.int64]:
    """Branch combination of every simulated year 1..N (stratified by weight, random order).

    Parameters
    ----------
    weights : array_like, shape (n_combinations,) [-]
        Logic-tree weight of each branch combination (summing to 1).
    n_years : int
        Number of simulated years N.
    seed : int
        Non-negative seed; the generator is ``SeedSequence([seed, STREAM_BRANCH_YEARS])``.

    Returns
    -------
    ndarray of int64, shape (n_years,)
        Entry ``y - 1`` is the combination of year ``y``; combination ``c`` holds exactly
        :func:`allocate_years` ``[c]`` years, placed by a uniformly random permutation
        (module notes, "Whole logic tree").
    """
    seed = check_seed(seed)
    counts = allocate_years(weights, n_years)
    labels = np.repeat(np.arange(counts.size, dtype=np.int64), counts)
    return stream_rng(seed, STREAM_BRANCH_YEARS).permutation(labels)


def branch_rng(seed: int, branch_index: int) -> np.random.Generator:
    """The generator of source-model branch ``s``'s occurrences: ``SeedSequence([seed, STREAM_BRANCH_EVENTS, s])``.

    One stream per branch, so a branch's events do not depend on the other branches'
    rupture sets.
    """
    seed = check_seed(seed)
    if isinstance(branch_index, (bool, np.bool_)) or not isinstance(branch_index, numbers.Integral) \
            or branch_index < 0:
        raise ValueError(f"branch_index must be a non-negative integer; got {branch_index!r}")
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(
        [seed, STREAM_BRANCH_EVENTS, int(branch_index)])))


def logic_tree_event_set(branch_rates, year_branch: ArrayLike, seed: int) -> EventSet:
    r"""Poisson occurrences when each simulated year belongs to one source-model branch.

    Parameters
    ----------
    branch_rates : sequence of array_like, each shape (n_ruptures_s,) [1/yr]
        Annual rupture rates of each source-model branch ``s`` (finite, >= 0).
    year_branch : array_like of int, shape (n_years,)
        Source-model branch of every year 1..N (index into ``branch_rates``), e.g. the
        source branch of :func:`branch_years`' combinations.
    seed : int
        Non-negative seed; branch ``s`` draws from :func:`branch_rng` ``(seed, s)``.

    Returns
    -------
    EventSet
        ``rupture`` indexes the concatenation of the branches' rupture lists (branch ``s``
        starts at ``sum(len(branch_rates[:s]))``); events sorted by year, then rupture,
        then occurrence; ``n_years = len(year_branch)``.

    Notes
    -----
    For branch :math:`s` with years :math:`Y_s` (:math:`N_s = |Y_s|`),
    :math:`K_r \sim \mathrm{Poisson}(\nu_r N_s)` occurrences of each of its ruptures, each
    in a year drawn uniformly from :math:`Y_s`: independent :math:`\mathrm{Poisson}(\nu_r)`
    counts in every year of :math:`Y_s` and none elsewhere (conditional uniformity,
    module notes). With one branch owning every year this is the distribution of
    :func:`stochastic_event_set` (drawn from another stream).
    """
    seed = check_seed(seed)
    yb = np.asarray(year_branch)
    if yb.ndim != 1 or yb.size == 0 or not np.issubdtype(yb.dtype, np.integer):
        raise ValueError(f"year_branch must be a non-empty 1-D integer array; got {yb!r}")
    if yb.size > np.iinfo(np.int32).max:
        raise ValueError(f"at most {np.iinfo(np.int32).max} years; got {yb.size}")
    rates = []
    for s, r in enumerate(branch_rates):
        r = np.asarray(r, dtype=np.float64)
        if r.ndim != 1 or not np.all(np.isfinite(r)) or np.any(r < 0):
            raise ValueError(f"branch_rates[{s}] must be a 1-D array of finite rates >= 0 [1/yr]")
        rates.append(r)
    if yb.min() < 0 or yb.max() >= len(rates):
        raise ValueError(f"year_branch must index the {len(rates)} branches; got values in [{yb.min()}, {yb.max()}]")
    offset = 0
    ruptures, years = [], []
    for s, r in enumerate(rates):
        own = (np.flatnonzero(yb == s) + 1).astype(np.int32)
        if own.size:
            rng = branch_rng(seed, s)
            counts = rng.poisson(r * own.size)
            ruptures.append(offset + np.repeat(np.arange(r.size, dtype=np.int64), counts))
            years.append(own[rng.integers(0, own.size, size=int(counts.sum()))])
        offset += r.size
    rupture = np.concatenate(ruptures) if ruptures else np.zeros(0, dtype=np.int64)
    year = np.concatenate(years).astype(np.int32) if years else np.zeros(0, dtype=np.int32)
    order = np.lexsort((rupture, year))
    rupture, year = rupture[order], year[order]
    event_id = np.arange(1, rupture.size + 1, dtype=np.int64)
    return EventSet(_readonly(event_id), _readonly(year), _readonly(rupture), int(yb.size))


def group_factor_rng(seed: int, block_index: int, group: int) -> np.random.Generator:
    """The generator of the group factors of one event block and group.

    Parameters
    ----------
    seed : int
        The run's non-negative seed.
    block_index : int
        Global event block ``b`` >= 0.
    group : int
        Index ``g`` >= 0 of the group (building class or exposure grouping value) whose assets
        share part of their damage and loss-ratio uncertainty
        (:mod:`quakefolio.core.events.secondary`).

    Returns
    -------
    numpy.random.Generator
        PCG64 seeded by ``SeedSequence([seed, STREAM_GROUP_FACTOR, b, g])``: identical whatever
        the chunking of whole blocks into tasks, and independent of the number of groups.
    """
    seed = check_seed(seed)
    for name, v in (("block_index", block_index), ("group", group)):
        if isinstance(v, (bool, np.bool_)) or not isinstance(v, numbers.Integral) or v < 0:
            raise ValueError(f"{name} must be a non-negative integer; got {v!r}")
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(
        [seed, STREAM_GROUP_FACTOR, int(block_index), int(group)])))


def conditioned_rng(seed: int, rupture: int, gmm: int, im: int) -> np.random.Generator:
    """The generator of station-conditioned residuals: ``SeedSequence([seed, STREAM_CONDITIONED, r, g, k])``.

    Parameters
    ----------
    seed : int
        The run's non-negative seed.
    rupture, gmm, im : int
        Scenario rupture, ground-motion model and IM index, each >= 0.

    Returns
    -------
    numpy.random.Generator
        A PCG64 generator independent of every other stream.
    """
    seed = check_seed(seed)
    parts = [int(rupture), int(gmm), int(im)]
    if min(parts) < 0:
        raise ValueError(f"rupture, gmm and im must be >= 0; got {parts}")
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, STREAM_CONDITIONED, *parts])))
