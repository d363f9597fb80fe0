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
* the period of the day of each event (time-of-day occupancy):
  ``SeedSequence([seed, STREAM_OCCUPANCY])`` (:func:`stream_rng`).

Every stream tag of the project is defined here and nowhere else; the tags are part of
the reproducibility contract (changing one changes the draws of its quantity).

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
    "STREAM_OCCUPANCY",
    "MAX_CLASS_ENTRIES",
    "EventSet",
    "stochastic_event_set",
    "event_blocks",
    "block_rng",
    "stream_rng",
    "class_block_index",
    "damage_block_rng",
    "check_seed",
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
#: Stream tag of the per-event ground-motion-model draw (one generator for the event set).
STREAM_GMM_CHOICE = 11
#: Stream tag of the per-event period of the day (time-of-day occupancy; one generator for the event set).
STREAM_OCCUPANCY = 17
#: Class entries per event block in the packed index of :func:`class_block_index`.
MAX_CLASS_ENTRIES = 4096

#: Streams drawn per event block (:func:`block_rng`).
_STREAMS = (STREAM_EVENT_SET, STREAM_GROUND_MOTION, STREAM_DAMAGE, STREAM_LOSS_RATIO)
#: Streams drawn once per event set (:func:`stream_rng`).
_WHOLE_SET_STREAMS = (STREAM_EVENT_SET, STREAM_GMM_CHOICE, STREAM_OCCUPANCY)


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
        :data:`STREAM_EVENT_SET`, :data:`STREAM_GMM_CHOICE` or :data:`STREAM_OCCUPANCY`.

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
