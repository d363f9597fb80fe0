"""Progress bars per stage on a terminal (rich); silent when piped or with ``--quiet``.

The executors report each finished item of a stage through :func:`advance`; the CLI
decides whether bars are shown by entering :class:`StageProgress`.  Bars go to stderr so
that stdout stays the summary.
"""
from __future__ import annotations

import threading

__all__ = ["StageProgress", "stage", "advance"]

_active = None
_lock = threading.Lock()


class StageProgress:
    """Context manager that shows one bar per stage while it is entered (if enabled)."""

    def __init__(self, enabled):
        self.enabled = enabled
        self._progress = None
        self._tasks = {}

    def __enter__(self):
        global _active
        if self.enabled:
            from rich.console import Console
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

            self._progress = Progress(TextColumn("{task.description:<24}"), BarColumn(), MofNCompleteColumn(),
                                      TimeElapsedColumn(), console=Console(stderr=True), transient=True)
            self._progress.start()
            _active = self
        return self

    def __exit__(self, *exc):
        global _active
        if self._progress is not None:
            self._progress.stop()
        _active = None
        return False

    def _stage(self, name, total):
        with _lock:
            if name not in self._tasks:
                self._tasks[name] = self._progress.add_task(name, total=total)
            else:
                self._progress.update(self._tasks[name], total=self._progress.tasks[self._tasks[name]].total + total)

    def _advance(self, name, n):
        with _lock:
            if name in self._tasks:
                self._progress.advance(self._tasks[name], n)


def stage(name, total):
    """Announce ``total`` items of stage ``name`` (no-op without an active display).

    A stage announced again adds ``total`` to its bar's total.

    Parameters
    ----------
    name : str
        Stage name, shown as the bar's label.
    total : int
        Items (blocks, chunks) the stage will report.
    """
    if _active is not None:
        _active._stage(name, total)


def advance(name, n=1):
    """Mark ``n`` items of stage ``name`` done (no-op without an active display).

    Parameters
    ----------
    name : str
        Stage name given to :func:`stage`.
    n : int
        Items finished.
    """
    if _active is not None:
        _active._advance(name, n)
