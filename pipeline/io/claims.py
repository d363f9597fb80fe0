"""Who is writing a hidden work folder, and claiming a run's final name once.

A run (and a change report) is written in a hidden folder that holds an owner record,
``.writer.json``: the host name, the kernel's boot id, the process-id namespace, the
process id, the process start time (clock ticks since boot, ``/proc/<pid>/stat``) and a
random token.  A process id alone means nothing on a file system shared by several
machines or containers, so a work folder is judged by its whole record
(:func:`owner_state`):

``live``
    written by a process of this host, boot and process-id namespace that still runs
    (same id and same start time): left alone;
``dead``
    of this host, boot and namespace, and its process is gone (or the id was reused by a
    process that started later): removed by the next writer (:func:`sweep`);
``foreign``
    of another host, boot or namespace: nothing here can tell whether it still runs, so
    it is never removed;
``unknown``
    no readable record (written by an older version, or by hand): never removed either.

Claiming a name (:func:`claim_run`): the owner record is written into a private folder
``.claim-<random>`` first, which is then renamed to ``.partial-<run_id>``.  Renaming a
folder onto an existing non-empty folder fails, so exactly one writer gets each id;
the others take the next suffix ``-2``, ``-3``, ...  A run id that already names a
finished run is never taken, and a finished run is never replaced.

Removal goes through a rename to ``.trash-<random>`` first, so no half-deleted folder
ever carries a name a writer could claim.
"""
from __future__ import annotations

import errno
import json
import os
import re
import secrets
import shutil
import socket
from pathlib import Path

from quakefolio.core.errors import OutputError
from quakefolio.pipeline.io.atomic import rename_folder

__all__ = ["RUN_ID", "PARTIAL_PREFIX", "OWNER_FILE", "CLAIM_PREFIX", "TRASH_PREFIX", "this_writer", "read_owner", "owner_state",
           "new_private_folder", "discard", "sweep", "claim_run", "process_start_ticks", "process_alive"]

#: A run id of our own form: UTC time stamp, 8 hex digits of the inputs digest, optional suffix.
RUN_ID = re.compile(r"[0-9]{8}T[0-9]{6}Z-[0-9a-f]{8}(?:-[1-9][0-9]{0,5})?")
PARTIAL_PREFIX = ".partial-"
OWNER_FILE = ".writer.json"
CLAIM_PREFIX = ".claim-"
TRASH_PREFIX = ".trash-"
_FIELDS = ("host", "boot_id", "pid_ns", "pid", "start_ticks", "token")
_TAKEN = (errno.ENOTEMPTY, errno.EEXIST, errno.ENOTDIR, errno.EISDIR)


def _read_first_line(path):
    try:
        with open(path, encoding="ascii", errors="replace") as fh:
            return fh.readline().strip() or None
    except OSError:
        return None


def process_start_ticks(pid):
    """Start time of process ``pid`` in clock ticks since boot, or None when it does not exist.

    Parameters
    ----------
    pid : int
        Process id.

    Returns
    -------
    int or None
        Field 22 of ``/proc/<pid>/stat`` (proc(5)); None when the process does not exist or
        the system has no ``/proc``.
    """
    try:
        with open(f"/proc/{int(pid)}/stat", "rb") as fh:
            stat = fh.read().decode("ascii", "replace")
    except (OSError, ValueError):
        return None
    try:  # the command name (field 2) is in parentheses and may hold spaces: split after the last ')'
        return int(stat[stat.rindex(")") + 2:].split()[19])
    except (ValueError, IndexError):
        return None


def process_alive(pid):
    """Whether another process with this id exists (POSIX signal 0 probe; this process: False).

    Parameters
    ----------
    pid : int
        Process id, e.g. the suffix of a partial run folder.

    Returns
    -------
    bool
        True if the process exists (also when it belongs to another user), False if it
        does not or if ``pid`` is this process.
    """
    if pid == os.getpid():
        return False  # e.g. a leftover of an earlier run that had this very process id
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _pid_namespace():
    try:
        return os.readlink("/proc/self/ns/pid")
    except OSError:
        return None


def this_writer():
    """The owner record of this process (a new random token on every call).

    Returns
    -------
    dict
        ``host``, ``boot_id`` (None without ``/proc``), ``pid_ns`` (None without
        ``/proc``), ``pid``, ``start_ticks`` and ``token`` (16 hex characters).
    """
    return {"host": socket.gethostname(), "boot_id": _read_first_line("/proc/sys/kernel/random/boot_id"),
            "pid_ns": _pid_namespace(), "pid": os.getpid(), "start_ticks": process_start_ticks(os.getpid()),
            "token": secrets.token_hex(8)}


def read_owner(folder):
    """The owner record of a work folder, or None when it has none or it is unreadable.

    Parameters
    ----------
    folder : path-like
        A work folder (partial run, claim, partial change report).

    Returns
    -------
    dict or None
    """
    try:
        record = json.loads((Path(folder) / OWNER_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(record, dict) or any(k not in record for k in _FIELDS):
        return None
    return record


def owner_state(record, me=None):
    """``"live"``, ``"dead"``, ``"foreign"`` or ``"unknown"``: see the module notes.

    Parameters
    ----------
    record : dict or None
        An owner record (:func:`read_owner`).
    me : dict, optional
        The record of this process (default :func:`this_writer`).

    Returns
    -------
    str
    """
    if record is None:
        return "unknown"
    me = me or this_writer()
    same_machine = (record["host"] == me["host"] and me["boot_id"] is not None
                    and record["boot_id"] == me["boot_id"] and record["pid_ns"] == me["pid_ns"])
    if not same_machine:
        return "foreign"
    pid = record["pid"]
    if not isinstance(pid, int) or isinstance(pid, bool) or pid <= 0:
        return "unknown"
    started = process_start_ticks(pid)
    if started is None:
        return "dead"  # this machine has /proc (it has a boot id) and no such process
    return "live" if started == record["start_ticks"] else "dead"


def new_private_folder(parent, prefix):
    """A new folder ``<parent>/<prefix><random>`` holding this process's owner record.

    Parameters
    ----------
    parent : path-like
        An existing folder.
    prefix : str
        Name prefix (hidden names start with ``.``).

    Returns
    -------
    pathlib.Path
    """
    parent = Path(parent)
    while True:
        folder = parent / f"{prefix}{secrets.token_hex(8)}"
        try:
            folder.mkdir()
            break
        except FileExistsError:
            continue
    (folder / OWNER_FILE).write_text(json.dumps(this_writer()) + "\n", encoding="utf-8")
    return folder


def discard(folder, expected=None):
    """Remove a work folder: renamed to ``.trash-<random>`` beside it, then deleted.

    Parameters
    ----------
    folder : path-like
        The folder to remove.
    expected : dict, optional
        The owner record it was judged by; if the renamed folder holds another record (a
        new writer took the name meanwhile), it is renamed back and kept.

    Returns
    -------
    bool
        True when the folder was removed.
    """
    folder = Path(folder)
    trash = folder.with_name(f"{TRASH_PREFIX}{secrets.token_hex(8)}")
    try:
        rename_folder(folder, trash)
    except OSError:
        return False  # gone already (another writer removed it) or not ours to move
    if expected is not None and read_owner(trash) != expected:
        try:
            rename_folder(trash, folder)
            return False
        except OSError:
            pass
    shutil.rmtree(trash, ignore_errors=True)
    return True


def sweep(parent, prefixes, me=None):
    """Remove dead work folders of this machine under ``parent``; list those left alone.

    Folders whose name starts with one of ``prefixes`` (or ``.claim-``) are judged by
    :func:`owner_state`: ``dead`` ones are removed, ``live`` ones kept silently,
    ``foreign`` and ``unknown`` ones kept and listed (a ``.claim-`` folder without a record
    is one being created: kept silently).  Leftover ``.trash-`` folders are deleted.

    Parameters
    ----------
    parent : path-like
        The folder to look in (missing: nothing to do).
    prefixes : tuple of str
        Name prefixes of the work folders.
    me : dict, optional
        The record of this process (default :func:`this_writer`).

    Returns
    -------
    list of pathlib.Path
        The foreign and unknown work folders, left alone.
    """
    parent = Path(parent)
    me = me or this_writer()
    left = []
    try:
        entries = sorted(parent.iterdir())
    except OSError:
        return left
    for p in entries:
        name = p.name
        if name.startswith(TRASH_PREFIX):
            shutil.rmtree(p, ignore_errors=True)
            continue
        is_claim = name.startswith(CLAIM_PREFIX)
        if not (is_claim or name.startswith(tuple(prefixes))) or p.is_symlink() or not p.is_dir():
            continue
        record = read_owner(p)
        state = owner_state(record, me)
        if state == "dead":
            discard(p, expected=record)
        elif state in ("foreign", "unknown") and not (is_claim and record is None) and p.exists():
            left.append(p)
    return left


def claim_run(runs, base_id, partial_prefix=PARTIAL_PREFIX, *, max_tries=10000):
    """Claim a free run id under ``runs``: ``base_id``, else ``base_id-2``, ``-3`` ...

    Parameters
    ----------
    runs : pathlib.Path
        The ``runs`` folder (existing).
    base_id : str
        The preferred run id.
    partial_prefix : str
        Prefix of partial run folders (``.partial-``).
    max_tries : int
        How many suffixes are tried before giving up.

    Returns
    -------
    (str, pathlib.Path)
        The claimed run id and its partial folder ``<runs>/<partial_prefix><run_id>``
        (holding this process's owner record).

    Raises
    ------
    OutputError
        When no id is free after ``max_tries`` suffixes.
    """
    private = new_private_folder(runs, CLAIM_PREFIX)
    try:
        for n in range(1, max_tries + 1):
            run_id = base_id if n == 1 else f"{base_id}-{n}"
            if os.path.lexists(runs / run_id):
                continue
            partial = runs / f"{partial_prefix}{run_id}"
            try:
                rename_folder(private, partial)
            except OSError as exc:
                if exc.errno in _TAKEN:
                    continue  # another writer holds this id
                raise
            if not os.path.lexists(runs / run_id):
                return run_id, partial
            rename_folder(partial, private)  # published by another writer just before our claim
        raise OutputError(runs, f"no free run id after {max_tries} tries from {base_id!r}")
    finally:
        if private.exists():
            shutil.rmtree(private, ignore_errors=True)
