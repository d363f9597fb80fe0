"""The output folder: which folders a run may write into, and marking ours.

An output folder holds ``runs/``, ``LATEST``, ``cache/``, ``reports/``, ``comparisons/``,
``exports/`` and ``history.parquet`` (see :mod:`quakefolio.pipeline.io.store`) and the marker
file ``.quakefolio-output``,
written before anything else.  A run writes only into

- a folder that does not exist yet (created), or an empty one;
- a folder of ours: it holds the marker, or (written by an earlier version) a ``runs/``
  folder with nothing but run folders of our id form and hidden work folders, or a
  ``cache/`` folder with nothing but our stage folders, or nothing but output folders of
  ours (another config's output nested in it, such as ``output/tabulated/``).

It refuses the root folder and the home folder, any other non-empty folder, a folder
inside a run folder or inside the ``runs/`` folder of an output folder, and a folder it
cannot write to.  :func:`check_output_folder` checks the config's ``[output] folder`` when
the inputs are read (the error names the config file, line and key, and nothing is
written); :func:`prepare_output_folder` checks again, creates the folder and writes the
marker when a run starts writing.
"""
from __future__ import annotations

import os
from pathlib import Path

from quakefolio.core.errors import InputError, InputWarning, OutputError, locate_toml_line
from quakefolio.pipeline.io.atomic import atomic_write_text
from quakefolio.pipeline.io.claims import CLAIM_PREFIX, PARTIAL_PREFIX, RUN_ID, sweep

__all__ = ["MARKER", "is_our_output", "output_folder_problem", "check_output_folder", "prepare_output_folder",
           "left_alone_warning"]

MARKER = ".quakefolio-output"
_MARKER_TEXT = ("This folder holds quakefolio outputs: runs/ (one folder per finished run), LATEST, cache/, "
                "reports/, comparisons/, exports/ and history.parquet.\nKeep this file: later runs recognise the "
                "folder by it.\n")
#: Cache subfolders the stages write (an older output folder may hold only these).
_CACHE_STAGES = frozenset({"hazard", "disaggregation", "damage", "events", "whatif"})


def _entries(folder):
    try:
        return [p.name for p in folder.iterdir()]
    except OSError:
        return None


def is_our_output(folder, *, depth=0):
    """Whether ``folder`` is an output folder written by quakefolio (see the module notes).

    Parameters
    ----------
    folder : path-like
        An existing folder.
    depth : int
        Nesting level (a folder holding only output folders of ours is ours; two levels
        are looked into).

    Returns
    -------
    bool
    """
    folder = Path(folder)
    if (folder / MARKER).is_file():
        return True
    runs = _entries(folder / "runs") if (folder / "runs").is_dir() else None
    if runs is not None and all(n.startswith(".") or RUN_ID.fullmatch(n) for n in runs):
        return True
    cache = _entries(folder / "cache") if (folder / "cache").is_dir() else None
    if cache and all(n in _CACHE_STAGES for n in cache):
        return True
    inner = _entries(folder) or []  # only output folders of other configs inside (e.g. output/tabulated/)
    return bool(inner) and depth < 2 and all((folder / n).is_dir() and not (folder / n).is_symlink()
                                              and is_our_output(folder / n, depth=depth + 1) for n in inner)


def _inside_a_run(folder):
    """The run folder or ``runs/`` folder that ``folder`` is or lies in, or None."""
    for a in (folder, *folder.parents):
        if a.parent.name == "runs" and ((a / "manifest.json").is_file() or a.name.startswith(PARTIAL_PREFIX)):
            return f"is inside run folder {a}; finished runs are never modified"
        if a.name == "runs" and a.parent != a and a.parent.is_dir() and is_our_output(a.parent):
            return f"is inside {a}, the runs folder of output folder {a.parent}"
    return None


def _not_writable(folder):
    """Why ``folder`` cannot be created or written to, or None."""
    probe = folder
    while not probe.exists():
        if probe.is_symlink():
            return f"cannot be created: {probe} is a broken symbolic link"
        probe = probe.parent
    if not probe.is_dir():
        return f"cannot be created: {probe} is a file"
    if not os.access(probe, os.W_OK | os.X_OK):
        return "is not writable (permission denied)" if probe == folder else \
            f"cannot be created: {probe} is not writable (permission denied)"
    return None


def output_folder_problem(folder):
    """Why a run must not write into ``folder``, or None when it may.

    Parameters
    ----------
    folder : path-like
        The output folder (absolute, as resolved from the config).

    Returns
    -------
    str or None
        The reason, worded to follow the folder's name.
    """
    folder = Path(os.path.abspath(folder))
    real = folder.resolve()
    if real == Path(real.anchor):
        return "is the root folder; name a folder of its own for the outputs"
    if real == Path.home().resolve():
        return "is the home folder; name a folder of its own for the outputs"
    inside = _inside_a_run(real)
    if inside:
        return inside
    if real.is_dir():
        entries = _entries(real)
        if entries is None:
            return "cannot be listed (permission denied)"
        if entries and not is_our_output(real):
            return ("is not empty and holds no quakefolio outputs (no runs/ folder, no marker file); name a new "
                    "or empty folder, or one used for earlier runs")
    elif real.exists():
        return "is an existing file; name a folder"
    return _not_writable(real)


def left_alone_warning(runs, left):
    """One warning line about unfinished run folders that no run here may remove.

    Parameters
    ----------
    runs : pathlib.Path
        The ``runs`` folder.
    left : list of pathlib.Path
        The foreign and unknown partial folders (:func:`quakefolio.pipeline.io.claims.sweep`).

    Returns
    -------
    InputWarning or None
    """
    if not left:
        return None
    names = ", ".join(repr(p.name) for p in left[:2]) + (f" and {len(left) - 2} more" if len(left) > 2 else "")
    return InputWarning(runs, f"{len(left)} unfinished run folder(s) of another host, boot or container, or of an "
                              f"older version, left alone ({names}); remove them by hand once those runs have ended")


def check_output_folder(config):
    """Check ``[output] folder`` of a loaded config before anything runs; write nothing.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
        The loaded run configuration.

    Returns
    -------
    list of InputWarning
        At most one: unfinished run folders of other hosts or boots found in ``runs/``
        (left alone by every run of this machine).

    Raises
    ------
    InputError
        Naming the config file, the line and ``output.folder`` when the folder must not
        be written into (see the module notes).
    """
    folder = Path(config.output.folder)
    problem = output_folder_problem(folder)
    if problem:
        try:
            text = Path(config.path).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError):
            text = ""
        raise InputError(config.path, f"output folder {str(folder)!r} {problem}",
                         row=locate_toml_line(text, ("output",), "folder"), column="output.folder")
    runs = folder / "runs"
    if not runs.is_dir():
        return []
    left = [p for p in _unfinished(runs) if p.name.startswith(PARTIAL_PREFIX)]
    warning = left_alone_warning(runs, left)
    return [warning] if warning else []


def _unfinished(runs):
    """Partial run folders of other hosts, boots or versions (read only: nothing is removed)."""
    from quakefolio.pipeline.io.claims import owner_state, read_owner, this_writer

    me, out = this_writer(), []
    for p in sorted(runs.iterdir()):
        if p.name.startswith(PARTIAL_PREFIX) and p.is_dir() and not p.is_symlink():
            if owner_state(read_owner(p), me) in ("foreign", "unknown"):
                out.append(p)
    return out


def prepare_output_folder(folder):
    """Check ``folder`` again, create it and write the marker; return its resolved path.

    Called when a run starts writing (before any cache entry or run folder).  Dead
    partial run folders of this machine are removed here too
    (:func:`quakefolio.pipeline.io.claims.sweep`).

    Parameters
    ----------
    folder : path-like
        The output folder.

    Returns
    -------
    (pathlib.Path, list of pathlib.Path)
        The resolved folder and the partial run folders left alone (other hosts, boots or
        versions).

    Raises
    ------
    OutputError
        When the folder must not be written into, or cannot be created or written to
        (naming it and what was attempted).
    """
    folder = Path(os.path.abspath(folder))
    problem = output_folder_problem(folder)
    if problem:
        raise OutputError(folder, f"output folder {problem}")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(folder, f"cannot create the output folder: {_reason(exc)}") from None
    folder = folder.resolve()
    try:
        if not (folder / MARKER).is_file():
            atomic_write_text(folder / MARKER, _MARKER_TEXT)
        (folder / "runs").mkdir(exist_ok=True)
    except OSError as exc:
        raise OutputError(folder, f"cannot write into the output folder: {_reason(exc)}") from None
    left = sweep(folder / "runs", (PARTIAL_PREFIX, CLAIM_PREFIX))
    return folder, [p for p in left if p.name.startswith(PARTIAL_PREFIX)]


def _reason(exc):
    """The OS's reason in lower case, e.g. ``permission denied``."""
    return (exc.strerror or type(exc).__name__).lower()
