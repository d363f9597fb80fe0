"""Modules imported on first use.

scipy's subpackages take a large share of the start-up time of a command (scipy.special,
scipy.sparse and scipy.spatial together about a second on a small machine), and a command
often needs none of them: an unchanged rerun, for one, reads its inputs and takes a finished
run's tables.  A module that calls scipy keeps a :class:`LazyModule` in the name it would
have imported (``special = lazy_module("scipy.special")``; calls read ``special.ndtr(...)``)
and the subpackage is imported at the first attribute read.
"""
from __future__ import annotations

from importlib import import_module

__all__ = ["LazyModule", "lazy_module"]


class LazyModule:
    """Stands for the module ``name``, importing it at the first attribute read."""

    __slots__ = ("_name", "_module")

    def __init__(self, name):
        object.__setattr__(self, "_name", name)
        object.__setattr__(self, "_module", None)

    def __getattr__(self, attr):
        module = object.__getattribute__(self, "_module")
        if module is None:
            module = import_module(object.__getattribute__(self, "_name"))
            object.__setattr__(self, "_module", module)
        return getattr(module, attr)

    def __repr__(self):
        return f"<module {object.__getattribute__(self, '_name')!r}, imported on first use>"


def lazy_module(name):
    """A stand-in for the module ``name`` that imports it at the first attribute read.

    Parameters
    ----------
    name : str
        Dotted module name, e.g. ``"scipy.special"``.

    Returns
    -------
    LazyModule
    """
    return LazyModule(name)
