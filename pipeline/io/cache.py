"""Stage results cached by content, so a rerun recomputes only what its inputs changed.

Every cached item is keyed by the sha256 of everything it depends on: the content of the
inputs it reads (file bytes, the site's coordinates and Vs30, the curve values, the class
parameters), the configuration it uses and the code version (a digest of quakefolio's own
source files).  The cache lives in ``<output>/cache/``; it is safe to delete, and every
entry is written atomically (:func:`quakefolio.pipeline.io.store.atomic_write_bytes` for a
file, :func:`quakefolio.pipeline.io.store.atomic_publish_folder` for a folder).

Two kinds of entry, one rule for trusting them:

- arrays: one numpy ``.npz`` archive per key, ``<stage>/<key[:2]>/<key>.npz``, read with
  ``allow_pickle=False`` (nothing in the cache is ever unpickled);
- tables: one folder per key, ``<stage>/<key>/``, holding a Parquet file per table and
  ``checks.json`` (the key, the table names, the stage's checks).

Each entry stores the key it was written for and a sha256 of its content (the arrays'
names, dtypes, shapes and bytes; the Parquet files' bytes and the checks).  On reading
both are recomputed and compared: a missing entry is a miss, and a corrupt, mismatched or
edited one (even a well-formed file with other numbers) is a miss that is removed, so the
stage recomputes and the new entry replaces it.

Granularity: hazard per site (all logic-tree branches of one site), damage and loss per
unique (site, class) pair, and the event-based and what-if stages as a whole (as tables:
their events share every site and asset).
"""
from __future__ import annotations

import errno
import hashlib
import io
import json
import os
import shutil
import threading
from functools import lru_cache
from pathlib import Path

import numpy as np

from quakefolio.pipeline.io.atomic import atomic_publish_folder, atomic_write_bytes
from quakefolio.pipeline.io.store import denied

__all__ = ["code_version", "digest", "content_digest", "fragility_class_digests", "StageCache", "PairStore",
           "row_digests"]


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
        if not dss.has_damage_states:
            blob = json.dumps({"im": dss.im, "levels": dss.levels.tolist(), "mean": dss.mean_loss_ratio.tolist(),
                               "cov": dss.cov.tolist()}, sort_keys=True)
            out[code] = hashlib.sha256(blob.encode()).hexdigest()
            continue
        blob = json.dumps({"im": dss.im, "names": list(dss.names), "medians": dss.medians.tolist(),
                           "betas": dss.betas.tolist(), "mdr": dss.mean_damage_ratio.tolist(),
                           "cov": dss.cov.tolist(), "collapse_index": dss.collapse_index}, sort_keys=True)
        out[code] = hashlib.sha256(blob.encode()).hexdigest()
    return out


def content_digest(arrays):
    """sha256 hex of a set of named arrays: names (sorted), dtypes, shapes and bytes.

    Parameters
    ----------
    arrays : dict str -> array_like

    Returns
    -------
    str
        64 hex digits; equal for equal content whatever the order of the dict.
    """
    h = hashlib.sha256()
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        h.update(f"{name}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _tables_digest(files, checks_text):
    """sha256 hex of a table entry: each Parquet file's sha256 (by name) and the checks' JSON."""
    h = hashlib.sha256()
    for name in sorted(files):
        h.update(f"{name}|{files[name]}|".encode())
    h.update(checks_text.encode())
    return h.hexdigest()


class _Untrusted(Exception):
    """A cache entry that exists but is not what was written for its key."""


def _remove(path):
    """Remove whatever sits at a cache entry's path (file, link or folder); best effort."""
    try:
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path, ignore_errors=True)
        else:
            path.unlink(missing_ok=True)
    except OSError:
        pass


def _raise_denied(exc, path):
    """An access error writing the cache as one OutputError naming the entry; other errors as they are."""
    out = denied(exc, path, "cannot write the cache entry (delete the cache folder or switch the cache off with "
                            "[execution] cache = false)")
    if out is not None:
        raise out from None
    raise exc


class StageCache:
    """The content cache of one output folder: arrays (``.npz``) and tables (Parquet folders).

    Arrays: key -> dict of arrays, one ``.npz`` per key under ``<output>/cache/<stage>/``
    (:meth:`get`, :meth:`put`).  Tables: key -> (dict of DataFrames, checks), one folder per
    key (:meth:`get_tables`, :meth:`put_tables`).  Every entry carries its key and a sha256
    of its content, checked on reading (see the module notes).

    A handle on the cache folder only (no state of its own): stages count their hits
    and misses in their results (:class:`quakefolio.pipeline.stages.products.CacheCounts`).

    Parameters
    ----------
    output_folder : path-like
        The run's output folder; the cache is its ``cache/`` subfolder.
    enabled : bool, default True
        When False every lookup is a miss and nothing is written.
    """

    def __init__(self, output_folder, enabled=True):
        self.root = Path(output_folder) / "cache"
        self.enabled = enabled

    def _path(self, stage, key):
        return self.root / stage / key[:2] / f"{key}.npz"

    def get(self, stage, key):
        """The arrays stored under ``key``, or None (missing, or not trusted: then removed).

        Parameters
        ----------
        stage : str
            The stage's cache folder.
        key : str
            Hex digest of everything the entry depends on.

        Returns
        -------
        dict str -> ndarray, or None
        """
        if not self.enabled:
            return None
        path = self._path(stage, key)
        try:
            with np.load(path, allow_pickle=False) as data:
                if str(data["__key__"]) != key:
                    raise _Untrusted("key mismatch")
                out = {k: data[k] for k in data.files if k not in ("__key__", "__sha256__")}
                stored = str(data["__sha256__"])
            if content_digest(out) != stored:
                raise _Untrusted("content does not match its digest")
        except FileNotFoundError:
            return None
        except Exception:  # corrupt, foreign or edited file (or a folder in its place): never trusted, removed
            _remove(path)
            return None
        return out

    def put(self, stage, key, arrays):
        """Store ``arrays`` under ``key`` with the key and their content digest (atomic write).

        Parameters
        ----------
        stage : str
            The stage's cache folder.
        key : str
            Hex digest of everything the entry depends on.
        arrays : dict str -> ndarray
            Names must not start with ``__``.
        """
        if not self.enabled:
            return
        path = self._path(stage, key)
        buffer = io.BytesIO()
        np.savez(buffer, __key__=np.array(key), __sha256__=np.array(content_digest(arrays)), **arrays)
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            if path.is_dir() and not path.is_symlink():
                _remove(path)  # a broken entry: a folder where the archive belongs
            atomic_write_bytes(path, buffer.getvalue())
        except OSError as exc:
            _raise_denied(exc, path)

    def get_tables(self, stage, key):
        """The tables and checks stored under ``key``, or None (missing, or not trusted: then removed).

        Parameters
        ----------
        stage : str
            The stage's cache folder (``"events"``, ``"whatif"``).
        key : str
            Hex digest of everything the stage's results depend on.

        Returns
        -------
        (dict str -> pandas.DataFrame, dict) or None
            The tables in the order they were stored, and the stage's checks.
        """
        import pyarrow as pa
        import pyarrow.parquet as pq

        if not self.enabled:
            return None
        folder = self.root / stage / key
        if folder.is_symlink() or (os.path.lexists(folder) and not folder.is_dir()):
            _remove(folder)  # a broken entry: never followed, never trusted
            return None
        if not folder.is_dir():
            return None
        try:
            meta = json.loads((folder / "checks.json").read_text(encoding="utf-8"))
            if meta.get("key") != key:
                raise _Untrusted("key mismatch")
            blobs = {name: (folder / f"{name}.parquet").read_bytes() for name in meta["tables"]}
            files = {name: hashlib.sha256(b).hexdigest() for name, b in blobs.items()}
            if _tables_digest(files, json.dumps(meta["checks"], sort_keys=True)) != meta["sha256"]:
                raise _Untrusted("content does not match its digest")
            tables = {name: pq.read_table(pa.BufferReader(b)).to_pandas() for name, b in blobs.items()}
        except Exception:  # corrupt, foreign or edited entry: never trusted, removed
            shutil.rmtree(folder, ignore_errors=True)
            return None
        return tables, meta["checks"]

    def put_tables(self, stage, key, tables, checks):
        """Store a stage's tables and checks under ``key`` (a folder renamed into place).

        An existing entry under the same key is replaced.  Written under a temporary name
        and published by :func:`quakefolio.pipeline.io.store.atomic_publish_folder`; if
        another process publishes the same key at the same moment, its entry is kept.

        Parameters
        ----------
        stage : str
            The stage's cache folder (``"events"``, ``"whatif"``).
        key : str
            Hex digest of everything the stage's results depend on.
        tables : dict str -> pandas.DataFrame
            Written as Parquet without the index.
        checks : dict
            JSON-able stage checks.
        """
        import pyarrow as pa
        import pyarrow.parquet as pq

        if not self.enabled:
            return
        parent = self.root / stage
        tmp = parent / f".{key}.{os.getpid()}.{threading.get_ident()}.tmp"
        shutil.rmtree(tmp, ignore_errors=True)
        try:
            tmp.mkdir(parents=True)
        except OSError as exc:
            _raise_denied(exc, tmp)
        try:
            files = {}
            for name, frame in tables.items():
                sink = pa.BufferOutputStream()
                pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), sink)
                blob = sink.getvalue().to_pybytes()
                (tmp / f"{name}.parquet").write_bytes(blob)
                files[name] = hashlib.sha256(blob).hexdigest()
            meta = {"key": key, "tables": list(tables), "checks": checks,
                    "sha256": _tables_digest(files, json.dumps(checks, sort_keys=True))}
            (tmp / "checks.json").write_text(json.dumps(meta), encoding="utf-8")
            final = parent / key
            if final.is_symlink() or (os.path.lexists(final) and not final.is_dir()):
                _remove(final)  # a broken entry that is not a folder: removed, then replaced
            try:
                atomic_publish_folder(tmp, final, replace=True)
            except OSError as exc:
                if exc.errno not in (errno.ENOTEMPTY, errno.EEXIST):
                    raise
                # another process published this key meanwhile: its entry stands
        finally:
            shutil.rmtree(tmp, ignore_errors=True)


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
