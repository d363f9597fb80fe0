"""The report as one HTML document: sections in order, header, key figures, atomic writing."""
from __future__ import annotations

import errno
import os
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from quakefolio.core.errors import OutputError
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.report.context import ReportRun, _created
from quakefolio.pipeline.report.figures import _RC
from quakefolio.pipeline.report.html import _CSS, _JS, _esc, _note
from quakefolio.pipeline.report.sections_assets import _section_damage, _section_fragility, _section_map
from quakefolio.pipeline.report.sections_assets import _section_riskiest
from quakefolio.pipeline.report.sections_changes import _section_changes
from quakefolio.pipeline.report.sections_hazard import _section_hazard
from quakefolio.pipeline.report.sections_overview import _key_figures, _section_checks, _section_inputs
from quakefolio.pipeline.report.sections_portfolio import _section_portfolio
from quakefolio.pipeline.report.sections_retrofit import _section_screening, _section_whatif
from quakefolio.pipeline.report.sections_trend import _section_trend
from quakefolio.pipeline.report.sections_people import _section_people
from quakefolio.pipeline.report.sections_summary import _section_breakdowns, _section_events, _section_exposure
from quakefolio.pipeline.io.store import atomic_write_text

__all__ = ["build_report", "write_report", "SECTIONS", "REPORT_MARKER", "is_our_report", "report_target",
           "default_report_file", "output_cache"]

#: In the head of every report: how an earlier report of ours is recognised before it is replaced.
REPORT_MARKER = '<meta name="generator" content="quakefolio report">'
_HEAD = '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'

#: Section ids and headings, in report order.
SECTIONS = (
    ("inputs", "Inputs and provenance"),
    ("exposure", "Exposure and annual loss by building class"),
    ("hazard", "Seismic hazard at the sites"),
    ("fragility", "Fragility curves by building class"),
    ("damage", "Damage-state rates and probabilities per asset"),
    ("riskiest", "The riskiest buildings"),
    ("portfolio", "Portfolio loss: exceedance curves, AAL, PML and TVaR"),
    ("events", "The largest simulated events"),
    ("breakdowns", "Breakdowns by exposure column"),
    ("screening", "Collapse-risk screening"),
    ("whatif", "Retrofit what-if and benefit-cost"),
    ("people", "People and time: casualties, downtime, losses by coverage"),
    ("map", "Map of assets"),
    ("changes", "Changes since the previous run"),
    ("trend", "Trend across the runs of the output folder"),
    ("checks", "Built-in cross-checks and hazard logic tree"),
)


def _safe(builder, *args):
    """A section body; a failure becomes a note in that section instead of breaking the report."""
    try:
        return builder(*args)
    except Exception as exc:  # noqa: BLE001 - one broken section must not lose the rest of the report
        return _not_drawn(exc)


def _not_drawn(exc):
    return _note(f"This section could not be drawn: {type(exc).__name__}: {exc}")


#: Sections drawn from the run's tables and its settings alone (the same for every run of the same
#: inputs and code), kept in the content cache; the others name the run, its timings or another run
#: (the trend reads the other runs of the output folder, so it is never cached).
CACHED_SECTIONS = frozenset({"hazard", "fragility", "damage", "riskiest", "portfolio", "screening", "whatif",
                             "people", "map", "exposure", "events", "breakdowns"})
#: Sections that draw figures (the trend sets the figure style itself, when it draws its figure).
_DRAWING_SECTIONS = CACHED_SECTIONS


def _section_key(run, sid):
    """Content-cache key of a section of ``run``, or None when the run does not say what it was made of."""
    sha = run.manifest.get("inputs_sha256")
    if not isinstance(sha, str) or not sha:
        return None
    from quakefolio.pipeline.io.cache import digest

    return digest("report-section", sid, sha, run.manifest.get("stages"))


@contextmanager
def _figure_style(drawing):
    """The report's matplotlib style within the block; matplotlib is not even imported when nothing is drawn."""
    if not drawing:
        yield
        return
    import matplotlib

    with matplotlib.rc_context(_RC):
        yield


def _bodies(builders, run, cache):
    """Every section body; with ``cache``, the cacheable ones are taken from it or drawn and stored."""
    bodies, todo = {}, {}
    for sid, (fn, *args) in builders.items():
        key = _section_key(run, sid) if cache is not None and sid in CACHED_SECTIONS else None
        found = None if key is None else cache.get("report", key)
        if found is not None:
            bodies[sid] = found["html"].tobytes().decode("utf-8")
        else:
            todo[sid] = (key, fn, args)
    with _figure_style(any(sid in _DRAWING_SECTIONS for sid in todo)):  # the others draw no figure
        for sid, (key, fn, args) in todo.items():
            try:
                bodies[sid] = fn(*args)
            except Exception as exc:  # noqa: BLE001 - as in _safe; a failed section is not cached
                bodies[sid] = _not_drawn(exc)
                continue
            if key is not None:
                try:
                    cache.put("report", key, {"html": np.frombuffer(bodies[sid].encode("utf-8"), dtype=np.uint8)})
                except (OutputError, OSError):  # a section not kept costs a later report time, never this one
                    pass
        keys = _safe(_key_figures, run)
    return {sid: bodies[sid] for sid in builders}, keys


def build_report(run_dir, *, previous_run=None, tables=None, cache=None):
    """The HTML report of one run, as a string (one self-contained document).

    Parameters
    ----------
    run_dir : path-like
        The run folder holding ``manifest.json`` and the Parquet tables; a finished run
        or a partial folder being written (only this folder is read).
    previous_run : path-like, optional
        A finished run (or an output folder, for its ``LATEST`` run) to compare with;
        adds the change report (:func:`quakefolio.pipeline.compare.compare_runs`).
    tables : Mapping name -> DataFrame, pyarrow.Table or ChunkedTable, optional
        The run's tables still in memory (the run writing its own report), read instead of
        the folder's files (same content; see :class:`ReportRun`).  The report's cost then
        does not grow with re-reading them.
    cache : quakefolio.pipeline.io.cache.StageCache, optional
        The content cache of the run's output folder: sections drawn from the tables alone
        (:data:`CACHED_SECTIONS`) are taken from it when the inputs digest, the stages and the
        code are the same, else drawn and stored; the document is the same byte for byte.

    Returns
    -------
    str
        HTML5: caution first, key figures, then one ``<section id=...>`` per entry of
        :data:`SECTIONS`.  Plots are inline base64 PNG; no external resource is referenced.

    Raises
    ------
    InputError
        When ``run_dir`` is not a folder or holds no readable ``manifest.json``.
    """
    run = ReportRun(run_dir, tables)
    builders = {
        "inputs": (_section_inputs, run), "exposure": (_section_exposure, run), "hazard": (_section_hazard, run),
        "fragility": (_section_fragility, run),
        "damage": (_section_damage, run), "riskiest": (_section_riskiest, run),
        "portfolio": (_section_portfolio, run), "events": (_section_events, run),
        "breakdowns": (_section_breakdowns, run), "screening": (_section_screening, run),
        "whatif": (_section_whatif, run), "people": (_section_people, run), "map": (_section_map, run),
        "changes": (_section_changes, run, previous_run), "trend": (_section_trend, run, cache),
        "checks": (_section_checks, run),
    }
    bodies, keys = _bodies(builders, run, cache)
    scenario = run.manifest.get("scenario") or run.section("scenario").get("name", "")
    nav = "<nav><ol>" + "".join(f'<li><a href="#{sid}">{_esc(title)}</a></li>'
                                for sid, title in SECTIONS) + "</ol></nav>"
    sections = "".join(f'<section id="{sid}"><h2>{_esc(title)}</h2>{bodies[sid]}</section>' for sid, title in SECTIONS)
    version = (run.manifest.get("packages") or {}).get("quakefolio") or ""
    return (
        f"{_HEAD}{REPORT_MARKER}"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>quakefolio report: {_esc(scenario)} ({_esc(run.run_id)})</title>"
        f"<style>{_CSS}</style></head><body>"
        f'<p class="caution" id="caution" role="note">{_esc(CAUTION)}</p>'
        "<main><header>"
        f"<h1>{_esc(scenario)}</h1>"
        f"<p>Earthquake damage and loss of a building portfolio. Run {_esc(run.run_id)}, created {_esc(_created(run))}"
        f"; amounts in {_esc(run.currency)}; probabilities over {run.horizon:g} years.</p>"
        f"{nav}</header>{keys}{sections}"
        f"<footer>quakefolio {_esc(version)}. {_esc(CAUTION)}</footer>"
        f"</main><script>{_JS}</script></body></html>\n"
    )


def write_report(run_dir, out_path, *, previous_run=None, tables=None, cache=None):
    """Build the report of ``run_dir`` and write it to ``out_path`` atomically; return the path.

    Parameters
    ----------
    run_dir : path-like
        The run folder (finished, or partial while being written).
    out_path : path-like
        The HTML file to write: a new file or an earlier report (:func:`report_target`);
        its folder must exist.
    previous_run : path-like, optional
        A run to compare with (see :func:`build_report`).
    tables : Mapping, optional
        The run's tables still in memory (see :func:`build_report`).
    cache : quakefolio.pipeline.io.cache.StageCache, optional
        Content cache of unchanged sections (see :func:`build_report`).

    Returns
    -------
    pathlib.Path
        The file written (absolute, its folder resolved).

    Raises
    ------
    OutputError
        When the target is refused (:func:`report_target`) or cannot be written.
    InputError
        When ``run_dir`` is not a readable run.

    Notes
    -----
    Written through :func:`quakefolio.pipeline.io.store.atomic_write_text` (temporary file in
    the target folder, fsync, ``os.replace``): readers see the old file or the new one,
    never a half-written one.
    """
    out = report_target(out_path)
    text = build_report(run_dir, previous_run=previous_run, tables=tables, cache=cache)
    out = report_target(out)  # again: the file may have appeared while the report was built
    try:
        return atomic_write_text(out, text)
    except OSError as exc:
        if exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
            raise OutputError(out, f"cannot write the report: {exc.strerror.lower()}") from None
        raise


def is_our_report(path):
    """Whether ``path`` is a regular file holding a report written by quakefolio.

    A report carries :data:`REPORT_MARKER` in its head; reports written before the marker
    are recognised by their first line and their quakefolio footer.

    Parameters
    ----------
    path : path-like
        An existing file.

    Returns
    -------
    bool
    """
    try:
        with open(path, "rb") as fh:
            head = fh.read(4096).decode("utf-8", "replace")
            if REPORT_MARKER in head:
                return True
            if not head.startswith(_HEAD):
                return False
            return b"<footer>quakefolio " in head.encode() + fh.read(64 << 20)
    except OSError:
        return False


def output_cache(run):
    """The content cache of the output folder that holds ``run``, when that folder keeps one; else None.

    A run made with ``[execution] cache = true`` leaves ``<output folder>/cache/``; a report
    built again later (``quakefolio report``) takes its unchanged sections from there
    (:data:`CACHED_SECTIONS`, keyed by the inputs digest, the stages and the code) instead of
    drawing them again, and stores the ones it draws.  An output folder without a cache, or
    whose cache cannot be written, gets none: the report is drawn in full and nothing is
    written outside the report file.

    Parameters
    ----------
    run : path-like
        A run folder.

    Returns
    -------
    quakefolio.pipeline.io.cache.StageCache or None
    """
    run = Path(run)
    root = run.parent.parent / "cache"
    if run.parent.name != "runs" or not root.is_dir() or root.is_symlink() or not os.access(root, os.W_OK | os.X_OK):
        return None
    from quakefolio.pipeline.io.cache import StageCache

    return StageCache(run.parent.parent)


def default_report_file(run):
    """``<output folder>/reports/<run_id>.html`` for a run in an output folder's ``runs/``; the folder is created.

    Parameters
    ----------
    run : path-like
        A finished run folder.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    OutputError
        When the run is not in a ``runs/`` folder (the report has no default place: name
        it) or the ``reports`` folder cannot be created.
    """
    run = Path(run)
    if run.parent.name != "runs":
        raise OutputError(run, "is not in the runs/ folder of an output folder; name the report file with --out")
    folder = run.parent.parent / "reports"
    try:
        folder.mkdir(exist_ok=True)
    except OSError as exc:
        raise OutputError(folder, f"cannot create the reports folder: {(exc.strerror or 'exists').lower()}") from None
    return folder / f"{run.name}.html"


def report_target(path, *, runs=()):
    """Where a report may be written: a new file, or an earlier report of ours.

    The folder must exist (its symbolic links are followed); the file itself is judged
    without following a link: a symbolic link, a folder, a device, a pipe and any file that
    is not one of our reports are refused, so nothing but our own reports is ever replaced.

    Parameters
    ----------
    path : path-like
        The report file the user named (or the default one).
    runs : iterable of path-like or None
        Run folders the report must not be written into.

    Returns
    -------
    pathlib.Path
        The file to write (absolute; its folder resolved).

    Raises
    ------
    OutputError
        Naming the path and why it is refused.
    """
    given = Path(path)
    out = Path(os.path.realpath(given.parent if str(given.parent) else ".")) / given.name
    if not out.parent.is_dir():
        raise OutputError(out.parent, "folder does not exist")
    for run in runs:
        if run is not None and out.is_relative_to(Path(run).resolve()):
            raise OutputError(out, f"inside run folder {run}: finished runs are never modified")
    if not os.access(out.parent, os.W_OK | os.X_OK):
        raise OutputError(out, f"cannot write the report: permission denied (folder {out.parent} is not writable)")
    if not os.path.lexists(out):
        return out
    if out.is_symlink():
        why = "is a symbolic link"
    elif out.is_dir():
        why = "is a folder"
    elif not out.is_file():
        why = "is not a regular file (a device, pipe or socket)"
    elif not is_our_report(out):
        why = "exists and is not a quakefolio report"
    else:
        return out
    raise OutputError(out, f"{why}; a report is written only to a new file or over an earlier report")
