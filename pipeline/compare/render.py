"""The change report on disk (:func:`write_change_report`) and as printed text (:func:`change_summary_text`)."""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from quakefolio.core.errors import OutputError
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.compare.attribution import compare_runs
from quakefolio.pipeline.compare.diff import CAUSES
from quakefolio.pipeline.io.claims import OWNER_FILE, new_private_folder, sweep
from quakefolio.pipeline.io.store import PARTIAL_PREFIX, atomic_publish_folder, to_arrow
from quakefolio.pipeline.io.tables import TABLES, units_for
from quakefolio.pipeline.terminal import one_line

__all__ = ["write_change_report", "change_summary_text"]


# --- writing ---------------------------------------------------------------------------------------

def _inside(path, folder):
    try:
        path.relative_to(folder)
        return True
    except ValueError:
        return False


def write_change_report(run_a, run_b, out_dir=None, *, result=None):
    """Compare two runs and write the report; return the report folder.

    The folder is ``<out_dir>/<run_a_id>__<run_b_id>/`` with ``out_dir`` defaulting to
    ``<output folder of run B>/comparisons``.  It holds ``change_assets.parquet``,
    ``change_asset_damage.parquet``, ``change_portfolio.parquet`` (explicit schemas, units
    and provenance in the schema metadata) and ``change_causes.json``.  It is written
    under a hidden partial name and renamed into place when complete; an earlier report of
    the same pair is replaced only then.  Neither run folder is written to.

    Parameters
    ----------
    run_a, run_b : path-like
        Run folders, or output folders standing for their ``LATEST`` run.
    out_dir : path-like, optional
        The folder holding report folders (default ``<output folder of run B>/comparisons``).
    result : dict, optional
        :func:`compare_runs` of the same two runs (saves reading them twice).

    Returns
    -------
    pathlib.Path
        The report folder.

    Raises
    ------
    OutputError
        When the report would be written inside one of the run folders, ``out_dir`` is an
        existing file or cannot be written to, or ``<run_a_id>__<run_b_id>`` exists there
        and is not a change report (it is never replaced).
    """
    if result is None:
        result = compare_runs(run_a, run_b)
    causes = result["change_causes"]
    path_a, path_b = Path(causes["run_a"]["path"]), Path(causes["run_b"]["path"])
    if out_dir is None and path_b.parent.name != "runs":
        raise OutputError(path_b, "is not in the runs/ folder of an output folder; name the folder for the change "
                                  "report with --out")
    parent = (Path(out_dir) if out_dir is not None else path_b.parent.parent / "comparisons").resolve()
    for run in (path_a, path_b):
        if _inside(parent, run):
            raise OutputError(parent, f"the report would be written inside run folder {run}; runs are never modified")
    name = f"{causes['run_a']['run_id']}__{causes['run_b']['run_id']}"
    final = _report_folder(parent, name, given=out_dir)
    partial = new_private_folder(parent, f"{PARTIAL_PREFIX}{name}-")
    try:
        currency = causes["run_b"]["currency"] if causes["run_a"]["currency"] == causes["run_b"]["currency"] \
            else f"{causes['run_a']['currency']} (A) / {causes['run_b']['currency']} (B)"
        provenance = {
            "run_a": causes["run_a"]["run_id"], "run_b": causes["run_b"]["run_id"],
            "inputs_sha256_a": causes["run_a"]["inputs_sha256"], "inputs_sha256_b": causes["run_b"]["inputs_sha256"],
            "created_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ"),
            "quakefolio_version": _version(), "currency": currency, "caution": CAUTION,
        }
        for table in ("change_assets", "change_asset_damage", "change_portfolio"):
            arrow = to_arrow(result[table], name=table, units=units_for(table, currency),
                             description=TABLES[table]["description"], provenance=provenance)
            pq.write_table(arrow, partial / f"{table}.parquet", compression="zstd")
        text = json.dumps(dict(causes, created_utc=provenance["created_utc"]), indent=2, sort_keys=True) + "\n"
        with open(partial / "change_causes.json", "w", encoding="utf-8") as fh:
            fh.write(text)
        (partial / OWNER_FILE).unlink()
        atomic_publish_folder(partial, final, replace=True)
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    return final


def _report_folder(parent, name, *, given):
    """The report folder ``<parent>/<name>`` after checking ``parent`` (created) and an earlier report there.

    Dead partial report folders of this machine are removed (:func:`quakefolio.pipeline.io.claims.sweep`);
    an existing ``<name>`` is replaced only if it is an earlier change report (it holds
    ``change_causes.json``).
    """
    what = "--out" if given is not None else "the comparisons folder"
    if os.path.lexists(parent) and not parent.is_dir():
        raise OutputError(parent, f"{what} names an existing file; give the folder that holds change reports "
                                  "(each report is a folder <run_a_id>__<run_b_id>/ in it)")
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(parent, f"cannot create the folder for change reports: {(exc.strerror or '').lower()}") \
            from None
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(parent, "cannot write change reports here: permission denied")
    sweep(parent, (f"{PARTIAL_PREFIX}{name}-",))
    final = parent / name
    if os.path.lexists(final) and (final.is_symlink() or not (final / "change_causes.json").is_file()):
        raise OutputError(final, "exists and is not a change report; it is never replaced (give another --out)")
    return final


def _version():
    from importlib import metadata

    try:
        return metadata.version("quakefolio")
    except metadata.PackageNotFoundError:
        return None


# --- printed summary -------------------------------------------------------------------------------

def _money(x):
    return "n/a" if x is None or not np.isfinite(x) else f"{x:,.0f}"


def _signed(x):
    return "n/a" if x is None or not np.isfinite(x) else f"{x:+,.0f}"


def _pct(x):
    return "n/a" if x is None or not np.isfinite(x) else f"{100 * x:+.2f}%"


def _cause_lines(causes):
    """Inputs, classes, hazard sites, settings and simulation that changed between the runs."""
    lines = [f"  note: {note}" for note in causes["notes"]]
    changed = causes["inputs_changed"]
    lines.append(f"  input files changed: {', '.join(changed) if changed else 'none'}")
    frag = causes["fragility"]["classes_changed"]
    if frag:
        lines.append(f"  fragility changed for classes: {', '.join(frag)}")
    hz = causes["hazard"]
    lines.append(f"  hazard curves changed at {len(hz['sites_changed'])} of {hz['sites_b']} sites "
                 f"({hz['sites_changed_used_by_assets']} used by assets; {len(hz['sites_added'])} sites added, "
                 f"{len(hz['sites_removed'])} removed)")
    for s in causes["settings_changed"]:
        lines.append(f"  setting {s['setting']}: {s['a']} -> {s['b']}  ({s['scope']})")
    ev = causes["event_based"]
    if ev["in_a"] or ev["in_b"]:
        lines.append(f"  event-based: seed {ev['seed_a']} -> {ev['seed_b']}, years {ev['years_a']} -> {ev['years_b']}")
    return lines


def _portfolio_lines(port, cur):
    """Classical EAL, event-based AAL per basis and the PML/TVaR table of both runs."""
    eal = port[port.metric == "eal"].iloc[0]
    lines = [f"  portfolio EAL (classical)  {_money(eal.value_a)} -> {_money(eal.value_b)} {cur}/yr  "
             f"({_signed(eal.change)}, {_pct(eal.relative_change)})"]
    for r in port[port.metric == "aal"].itertuples():
        lines.append(f"  AAL ({r.basis})  {_money(r.value_a)} -> {_money(r.value_b)} {cur}/yr  "
                     f"({_signed(r.change)}, {_pct(r.relative_change)}; {r.versus_standard_error} the combined "
                     f"standard error {_money(r.combined_standard_error)})")
    ep = port[port.metric.isin(["pml_aep", "pml_oep", "tvar"])]
    if len(ep):
        lines.append(f"  {'basis':<12}{'RP yr':>8}{'PML AEP A -> B':>28}{'PML OEP A -> B':>28}{'TVaR A -> B':>28}")
        wide = ep.pivot_table(index=["basis", "return_period_yr"], columns="metric",
                              values=["value_a", "value_b"], dropna=False, sort=True)
        for (basis, rp), r in wide.iterrows():
            cells = [f"{_money(r[('value_a', k)])} -> {_money(r[('value_b', k)])}" if ("value_a", k) in r.index
                     else "n/a" for k in ("pml_aep", "pml_oep", "tvar")]
            lines.append(f"  {basis:<12}{rp:>8g}" + "".join(f"{c:>28}" for c in cells))
        lines.append("")
    return lines


def _asset_lines(causes, assets, cur, top_n):
    """Asset counts by primary cause and the assets with the largest absolute EAL change."""
    a = causes["assets"]
    lines = [f"  assets: {a['in_a']} in A, {a['in_b']} in B ({a['added']} added, {a['removed']} removed); "
             f"results changed for {a['results_changed']}"]
    order = [c for c in ("unchanged",) + CAUSES + ("unexplained",) if c in a["by_primary_cause"]]
    lines.append("  by primary cause: " + ", ".join(
        f"{c} {a['by_primary_cause'][c]} ({_signed(a['eal_change_by_primary_cause'][c])} {cur}/yr)"
        if c != "unchanged" else f"{c} {a['by_primary_cause'][c]}" for c in order))
    moved = assets[assets.results_changed]
    if not len(moved) or top_n <= 0:
        return lines
    top = moved.assign(_abs=moved.eal_change.abs()).sort_values(["_abs", "asset_id"], ascending=[False, True])
    top = top.head(top_n)
    lines.append("")
    lines.append(f"  {len(top)} asset{'s' if len(top) != 1 else ''} with the largest absolute EAL change:")
    lines.append(f"  {'asset_id':<12}{'status':<9}{'class':<10}{'site':<8}{'EAL A':>12}{'EAL B':>12}"
                 f"{'change':>12}{'':>3}causes")
    for r in top.itertuples():
        cls = r.building_class_b if r.building_class_b is not None else r.building_class_a
        site = r.site_id_b if r.site_id_b is not None else r.site_id_a
        lines.append(f"  {r.asset_id:<12}{r.status:<9}{cls:<10}{site:<8}{_money(r.eal_a):>12}"
                     f"{_money(r.eal_b):>12}{_signed(r.eal_change):>12}{'':>3}{r.causes or r.primary_cause}")
    return lines


def change_summary_text(result, report_folder=None, *, top_n=10):
    """The short printed change report (caution first) of a :func:`compare_runs` result.

    Parameters
    ----------
    result : dict
        The return value of :func:`compare_runs`.
    report_folder : path-like, optional
        Where the report was written (named on the last line).
    top_n : int
        Number of assets with the largest absolute EAL change to list.

    Returns
    -------
    str
        Lines of plain text, amounts in run B's currency.
    """
    causes, assets, port = result["change_causes"], result["change_assets"], result["change_portfolio"]
    cur = causes["run_b"]["currency"]
    lines = [CAUTION, "",
             f"quakefolio compare  A {causes['run_a']['run_id']} ({causes['run_a']['scenario']})  ->  "
             f"B {causes['run_b']['run_id']} ({causes['run_b']['scenario']})"]
    lines += _cause_lines(causes)
    lines.append("")
    lines += _portfolio_lines(port, cur)
    lines += _asset_lines(causes, assets, cur, top_n)
    if report_folder is not None:
        lines.append("")
        lines.append(f"  change report: {report_folder}")
    return "\n".join(one_line(line) for line in lines)  # a name's control characters shown escaped
