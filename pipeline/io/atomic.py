"""Atomic writes: a file or a folder is seen whole or not at all.

Every file the pipeline replaces in place (the ``LATEST`` pointer, a report, a cache
entry, the output-folder marker) goes through :func:`atomic_write_bytes` or
:func:`atomic_write_text`: a temporary file in the target folder, flushed and fsynced,
then renamed over the target.  A folder written completely under a hidden name is put in
place by :func:`atomic_publish_folder`; :func:`rename_folder` is the plain folder rename
used to claim names (it fails where the target is a non-empty folder).  This module is the
only place that renames over a target.
"""
from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

__all__ = ["fsync_path", "atomic_write_bytes", "atomic_write_text", "atomic_publish_folder",
           "rename_folder"]


def fsync_path(path):
    """fsync a file or folder by path (best effort: ignored where the OS refuses).

    Parameters
    ----------
    path : path-like
        File or folder whose data and metadata are flushed to disk.
    """
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write_bytes(path, data, *, mode=None):
    """Write ``data`` to ``path`` atomically: readers see the old file or the new one, never a part.

    The bytes go to a temporary file in the target folder (``.<name>.<random>.tmp``), are
    flushed and fsynced, then the file is renamed over ``path`` (``os.replace``) and the
    folder is fsynced.  The temporary file is removed if anything fails.

    Parameters
    ----------
    path : path-like
        The target file; its folder must exist.
    data : bytes
        The whole new content.
    mode : int, optional
        Permission bits of the new file; default ``0o666`` less the process umask (as for
        a file created with ``open``).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        if mode is None:
            mask = os.umask(0)
            os.umask(mask)
            mode = 0o666 & ~mask
        os.chmod(tmp, mode)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    fsync_path(folder)
    return path


def atomic_write_text(path, text, *, mode=None):
    """Write ``text`` (UTF-8, newlines as given) to ``path`` atomically; see :func:`atomic_write_bytes`.

    Parameters
    ----------
    path : path-like
        The target file; its folder must exist.
    text : str
        The whole new content.
    mode : int, optional
        Permission bits of the new file (default: ``0o666`` less the umask).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    return atomic_write_bytes(path, text.encode("utf-8"), mode=mode)


def atomic_publish_folder(partial, final, *, replace=False):
    """Rename a completely written folder into place: readers see no folder, the old one or the new one.

    Every file of ``partial`` and the folder itself are fsynced, then ``partial`` is renamed
    to ``final`` (``os.replace`` of a folder within one file system is atomic) and the
    parent folder is fsynced.  ``os.replace`` cannot rename over a non-empty folder: with
    ``replace=True`` an existing ``final`` is first moved aside (``.replaced-<name>-<pid>``
    beside it), put back if the rename fails, and removed once the new folder is in place.

    Parameters
    ----------
    partial : path-like
        The written folder (same parent file system as ``final``).
    final : path-like
        Its name once complete.
    replace : bool, default False
        Whether an existing ``final`` is replaced; without it an existing non-empty
        ``final`` makes the rename fail (``OSError``) and nothing changes.

    Returns
    -------
    pathlib.Path
        ``final``.
    """
    partial, final = Path(partial), Path(final)
    for f in partial.iterdir():
        fsync_path(f)
    fsync_path(partial)
    old = None
    if replace and final.exists():
        old = final.with_name(f".replaced-{final.name}-{os.getpid()}")
        os.replace(final, old)
    try:
        os.replace(partial, final)
    except BaseException:
        if old is not None:
            os.replace(old, final)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    fsync_path(final.parent)
    return final


def rename_folder(src, dst):
    """Rename folder ``src`` to ``dst`` (``os.rename``): fails if ``dst`` is a non-empty folder or a file.

    Parameters
    ----------
    src, dst : path-like
        Within one file system.

    Raises
    ------
    OSError
        ``ENOTEMPTY`` or ``EEXIST`` when ``dst`` is a non-empty folder, ``ENOTDIR`` when it
        is a file, ``ENOENT`` when ``src`` is gone.
    """
    os.rename(src, dst)
