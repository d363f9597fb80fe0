"""Independent blocks of the event stage's arithmetic on a few threads, with results that do not depend on them.

The event stage's work splits into blocks whose results are written to places of their
own: groups of ruptures (ground motion of the events that drew them), random-number
blocks of events (fields, truncation, losses) and the distinct correlation ranges of the
field sampler (Cholesky factors).  Each block does exactly the arithmetic it does alone,
in the same order (elementwise operations, and matrix products of the same shapes on a
single-threaded BLAS), draws from its own seeded stream
(:func:`quakefolio.core.events.eventset.block_rng`) and writes disjoint elements; sums
across blocks are formed afterwards in block order.  So the values are bit for bit those
of one thread, whatever the number of threads.

numpy, scipy's special functions and BLAS release the global interpreter lock inside
their loops, so the blocks of one process run on several cores (common practice for
numpy: ufunc loops on non-object arrays run without the lock).
"""
from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager

__all__ = ["serial_map", "block_map", "thread_count"]


def serial_map(fn, items):
    """``[fn(x) for x in items]``: the one-thread map of the kernels taking ``map_fn``.

    Parameters
    ----------
    fn : callable
        Applied to each item.
    items : iterable

    Returns
    -------
    list
        The results, in the order of ``items``.
    """
    return [fn(x) for x in items]


def thread_count(workers):
    """Threads a chunk of the event stage uses: ``workers`` in the main thread, else 1.

    A chunk run by an executor that already runs chunks concurrently (a flow's thread
    pool, a Dask worker's threads) keeps to one thread, so the process does not run
    ``workers`` x ``workers`` threads on ``workers`` cores.

    Parameters
    ----------
    workers : int
        ``[execution] max_workers``.

    Returns
    -------
    int
        At least 1.
    """
    if threading.current_thread() is not threading.main_thread():
        return 1
    return max(1, int(workers))


@contextmanager
def block_map(workers):
    """An ordered map over independent blocks on up to ``workers`` threads (module notes).

    Parameters
    ----------
    workers : int
        Threads; 1 or fewer: :func:`serial_map`, no thread started.

    Yields
    ------
    callable
        ``map_fn(fn, items) -> list`` of the results in the order of ``items``; the first
        exception of a block is raised once every block has finished or failed.
    """
    workers = int(workers)
    if workers <= 1:
        yield serial_map
        return
    with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="quakefolio-events") as pool:
        def map_fn(fn, items):
            futures = [pool.submit(fn, x) for x in items]
            for f in futures:  # every block ends before an error leaves (no writes after the return)
                f.exception()
            return [f.result() for f in futures]

        yield map_fn
