"""Paths in a run's outputs written relative to the config's folder.

A manifest or report mailed to a client must not show the local folders of the machine
that ran it, and a run folder moved with its inputs should still name them.  Every
absolute path in the manifest is therefore written relative to the folder of the run's
config file (``exposure.csv``, ``output``, ``../shared/sources.toml``), and the config
folder is removed from the front of paths inside longer text (warning lines such as
``sources.toml:29: column ...``).
"""
from __future__ import annotations

import os
import re
from pathlib import Path

__all__ = ["relative_paths"]


def _prefixes(base):
    """The config folder as written (absolute) and resolved (symbolic links followed), longest first."""
    forms = {os.path.abspath(base), str(Path(base).resolve())}
    return sorted(forms, key=len, reverse=True)


def _relative(text, bases):
    if os.path.isabs(text) and "\n" not in text and not re.search(r":\d+:|: ", text):
        for base in bases:
            try:
                return Path(os.path.relpath(text, base)).as_posix()
            except ValueError:  # another drive (Windows)
                continue
        return text
    for base in bases:
        text = text.replace(base.rstrip(os.sep) + os.sep, "")
    return text


def relative_paths(value, base):
    """``value`` with every absolute path relative to ``base`` (see the module notes).

    Parameters
    ----------
    value : JSON-like (dict, list, str, number, bool or None)
        E.g. a run manifest.
    base : path-like
        The config file's folder.

    Returns
    -------
    JSON-like
        A new value of the same shape; strings that are absolute paths become relative
        paths (POSIX separators), text that names paths under ``base`` loses that prefix.
    """
    bases = _prefixes(base)

    def walk(v):
        if isinstance(v, dict):
            return {k: walk(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [walk(x) for x in v]
        if isinstance(v, str):
            return _relative(v, bases)
        return v

    return walk(value)
