"""Stage results cached by content, so a rerun recomputes only what its inputs changed.

Every cached item is keyed by the sha256 of everything it depends on: the content of the
inputs it reads (file bytes, the site's coordinates and Vs30, the curve values, the class
parameters), the configuration it uses and the code version (a digest of quakefolio's own
source files).  The cache lives in ``<output>/cache/``; it is safe to delete, files are
written atomically, and an entry is used only when the key stored inside it matches the
key asked for (a corrupt or mismatched file is a miss and is removed).  Entries are numpy
``.npz`` archives read with ``allow_pickle=False``: nothing in the cache is ever unpickled.

Granularity: hazard per site (all logic-tree branches of one site), damage and loss per
unique (site, class) pair, and the event-based stage as a whole (its events share every
site and asset).
"""
from __future__ import annotations

import hashlib
import json
import os
import threading
from functools import lru_cache
from pathlib import Path

import numpy as np

__all__ = ["code_version", "digest", "fragility_class_digests", "StageCache", "PairStore", "row_digests"]


@lru_cache(maxsize=1)
def code_version():
    """sha256 of quakefolio's source files (any code change invalidates every cache entry).

    The digest runs over the relative path and bytes of every ``*.py`` file of
    ``quakefolio.core``, ``quakefolio.fragility`` and ``quakefolio.pipeline`` in sorted
    order; it is computed once per process.

    Returns
    -------
    str
        64 hex characters.
    """
    import quakefolio.core
    import quakefolio.fragility
    import quakefolio.pipeline

    h = hashlib.sha256()
    for mod in (quakefolio.core, quakefolio.fragility, quakefolio.pipeline):
        folder = Path(mod.__file__).parent
        for f in sorted(folder.rglob("*.py")):
            h.update(f.relative_to(folder).as_posix().encode())
            h.update(f.read_bytes())
    return h.hexdigest()


def digest(*parts):
    """sha256 hex of a sequence of JSON-able values and numpy arrays (with dtype and shape).

    The hash starts from :func:`code_version`; arrays contribute their dtype, shape and
    C-ordered bytes, other values their JSON text with sorted keys (``str`` for what JSON
    cannot encode); parts are separated by ``|``.

    Parameters
    ----------
    *parts : ndarray or JSON-able value
        Everything the cached item depends on, in a fixed order.

    Returns
    -------
    str
        64 hex characters.
    """
    h = hashlib.sha256(code_version().encode())
    for p in parts:
        if isinstance(p, np.ndarray):
            a = np.ascontiguousarray(p)
            h.update(f"{a.dtype.str}{a.shape}".encode())
            h.update(a.tobytes())
        else:
            h.update(json.dumps(p, sort_keys=True, default=str).encode())
        h.update(b"|")
    return h.hexdigest()


def fragility_class_digests(library):
    """sha256 per building class of its resolved parameters (to attribute changes between runs).

    Parameters
    ----------
    library : quakefolio.fragility.FragilityLibrary

    Returns
    -------
    dict code -> hex digest
    """
    out = {}
    for code, dss in sorted(library.classes.items()):
        blob = json.dumps({"im": dss.im, "names": list(dss.names), "medians": dss.medians.tolist(),
                           "betas": dss.betas.tolist(), "mdr": dss.mean_damage_ratio.tolist(),
                           "cov": dss.cov.tolist(), "collapse_index": dss.collapse_index}, sort_keys=True)
        out[code] = hashlib.sha256(blob.encode()).hexdigest()
    return out


class StageCache:
    """Key -> dict of arrays, one ``.npz`` per key under ``<output>/cache/<stage>/``.

    A handle on the cache folder only (no state of its own): stages count their hits
    and misses in their results (:class:`quakefolio.pipeline.stages.products.CacheCounts`).
    """

    def __init__(self, output_folder, enabled=True):
        self.root = Path(output_folder) / "cache"
        self.enabled = enabled

    def _path(self, stage, key):
        return self.root / stage / key[:2] / f"{key}.npz"

    def get(self, stage, key):
        """The arrays stored under ``key`` for ``stage``, or None on a miss.

        A file whose stored key differs from ``key`` or that cannot be read is a miss and is
        removed; a disabled cache always misses.

        Parameters
        ----------
        stage : str
            Cache subfolder (e.g. ``"hazard"``).
        key : str
            Hex digest of everything the entry depends on (:func:`digest`).

        Returns
        -------
        dict of str -> ndarray or None
        """
        if not self.enabled:
            return None
        path = self._path(stage, key)
        try:
            with np.load(path, allow_pickle=False) as data:
                if str(data["__key__"]) != key:
                    raise ValueError("key mismatch")
                out = {k: data[k] for k in data.files if k != "__key__"}
        except FileNotFoundError:
            return None
        except Exception:  # corrupt or foreign file: never trusted, removed
            path.unlink(missing_ok=True)
            return None
        return out

    def put(self, stage, key, arrays):
        """Store ``arrays`` under ``key`` for ``stage``, atomically (temporary file, then rename).

        Does nothing when the cache is disabled.

        Parameters
        ----------
        stage : str
            Cache subfolder (e.g. ``"hazard"``).
        key : str
            Hex digest of everything the entry depends on (:func:`digest`).
        arrays : dict of str -> ndarray
            The entry's content; names must not start with ``__``.
        """
        if not self.enabled:
            return
        path = self._path(stage, key)
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}.tmp")
        with open(tmp, "wb") as fh:
            np.savez(fh, __key__=np.array(key), **arrays)
        os.replace(tmp, path)



class PairStore:
    """Per-item results keyed by a 32-byte digest each, stored as one archive per group.

    Used for (site, class) pairs: one archive per class and settings, holding the digests
    of its pairs and their result rows; a lookup returns the rows found and the indices
    missing.
    """

    def __init__(self, cache, stage, group_key):
        self.cache, self.stage, self.group_key = cache, stage, group_key
        self._data = cache.get(stage, group_key) or {}

    @staticmethod
    def save_group(cache, stage, group_key, keys, arrays):
        """Store a group's rows (replacing what was stored), without reading it first.

        Parameters
        ----------
        cache : StageCache
            The cache to write into.
        stage : str
            Cache subfolder.
        group_key : str
            Hex digest of the group (e.g. one class and its settings).
        keys : ndarray, shape (n, 32), uint8
            Row digests (:func:`row_digests`).
        arrays : dict of str -> ndarray, each of length n
            Result rows aligned with ``keys``.
        """
        cache.put(stage, group_key, {"keys": keys, **arrays})

    def lookup(self, keys):
        """Stored rows for ``keys``: which were found, and their arrays.

        Parameters
        ----------
        keys : ndarray, shape (n, 32), uint8
            Row digests (:func:`row_digests`).

        Returns
        -------
        found : ndarray of bool, shape (n,)
            True where ``keys[i]`` is stored.
        rows : dict of str -> ndarray
            Stored arrays for the found rows, in the order of ``keys[found]`` (empty when
            nothing is stored).
        """
        stored = self._data.get("keys")
        if stored is None or len(stored) == 0 or len(keys) == 0:
            return np.zeros(len(keys), dtype=bool), {}
        index = {bytes(k): i for i, k in enumerate(stored)}
        pos = np.array([index.get(bytes(k), -1) for k in keys], dtype=np.int64)
        found = pos >= 0
        rows = {name: arr[pos[found]] for name, arr in self._data.items() if name != "keys"}
        return found, rows



def row_digests(*arrays):
    """One 32-byte sha256 per row of equally long arrays (rows flattened), as (n, 32) uint8.

    Each row hash starts from :func:`code_version` and takes the bytes of row ``i`` of every
    array in turn.

    Parameters
    ----------
    *arrays : ndarray, each of shape (n, ...)
        Arrays with the same first dimension.

    Returns
    -------
    ndarray, shape (n, 32), uint8
    """
    n = len(arrays[0])
    flat = [np.ascontiguousarray(a).reshape(n, -1) for a in arrays]
    out = np.empty((n, 32), dtype=np.uint8)
    salt = code_version().encode()
    for i in range(n):
        h = hashlib.sha256(salt)
        for a in flat:
            h.update(a[i].tobytes())
        out[i] = np.frombuffer(h.digest(), dtype=np.uint8)
    return out
