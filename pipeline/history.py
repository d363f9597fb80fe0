"""``quakefolio history``: the finished runs of an output folder, their headline figures and what changed.

One row per finished run in ``<output>/runs/`` (oldest first, by the creation time in the
run id, then its suffix), read through :class:`quakefolio.pipeline.io.store.RunFolder`:

- ``classical_eal`` [currency/yr]: sum of the assets' expected annual loss (``asset_loss``);
- ``event_aal`` [currency/yr]: the event-based ground-up average annual loss
  (``portfolio_summary``), where the run simulated events;
- ``pml_aep_<T>yr`` [currency]: the event-based ground-up loss at annual exceedance
  probability 1/T (``portfolio_ep``), for every return period T of any run listed;
- ``expected_collapses_in_horizon`` [-]: the sum over assets of the collapse probability in
  the horizon (the expected number of collapsed buildings), and
  ``annual_collapse_rate_sum`` [1/yr] (expected collapses per year);

a figure a run lacks (hazard-only runs, no event stage, a return period it did not
configure) is NaN.  For each run after the first: ``changed_inputs``, the input files whose
sha256 differs from the previous run's (``role: path``; ``added``/``removed`` roles
marked), and ``<figure>_change_pct``, the change of each headline figure from the previous
run in percent (NaN where either value is missing or the previous one is 0).

The table is written to ``<output>/history.parquet`` atomically (temporary file, then one
rename): an earlier history table of ours is replaced, any other file of that name is
left alone and the command refuses.  Runs are never modified.
"""
from __future__ import annotations

import io
import math
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from quakefolio.core.errors import InputError, OutputError
from quakefolio.pipeline.io.atomic import atomic_write_bytes
from quakefolio.pipeline.io.claims import RUN_ID
from quakefolio.pipeline.io.store import METADATA_KEY, RunFolder, to_arrow

__all__ = ["run_history", "write_history", "history_text", "HISTORY_FILE", "HEADLINE", "finished_runs",
           "headline_figures", "changed_inputs"]

HISTORY_FILE = "history.parquet"
#: Headline figures compared between runs (besides the PML columns), with their units.
HEADLINE = {"classical_eal": "{currency}/yr", "event_aal": "{currency}/yr",
            "expected_collapses_in_horizon": "-", "annual_collapse_rate_sum": "1/yr"}
_TABLE = "run_history"


def _runs(output):
    """Finished run folders of ``output`` (with a manifest), oldest first."""
    runs = Path(output) / "runs"
    if not runs.is_dir():
        raise InputError(output, "not an output folder (no runs/ folder)")
    found = [p for p in runs.iterdir() if RUN_ID.fullmatch(p.name) and p.is_dir() and not p.is_symlink()
             and (p / "manifest.json").is_file()]

    def order(p):
        # the run id's start second, then (runs started in the same second) when the manifest was
        # committed [ns]: the random part of the id carries no order
        stamp, _, rest = p.name.partition("-")
        suffix = rest.split("-")[1] if rest.count("-") else "1"
        return stamp, (p / "manifest.json").stat().st_mtime_ns, int(suffix), p.name

    return sorted(found, key=order)


def _headline(run):
    """The headline figures of one run (NaN where it lacks them) and its PML per return period."""
    out = dict.fromkeys(HEADLINE, math.nan)
    loss = run.optional_table("asset_loss", ["eal", "collapse_prob_in_horizon", "annual_collapse_rate"])
    if loss is not None:
        out["classical_eal"] = float(loss["eal"].sum())
        out["expected_collapses_in_horizon"] = float(loss["collapse_prob_in_horizon"].sum())
        out["annual_collapse_rate_sum"] = float(loss["annual_collapse_rate"].sum())
    summary = run.optional_table("portfolio_summary", ["basis", "aal"])
    if summary is not None:
        ground = summary[summary["basis"] == "ground_up"]
        if len(ground):
            out["event_aal"] = float(ground["aal"].iloc[0])
    pml = {}
    ep = run.optional_table("portfolio_ep", ["basis", "return_period_yr", "aep_loss"])
    if ep is not None:
        for rp, loss_at in ep[ep["basis"] == "ground_up"][["return_period_yr", "aep_loss"]].itertuples(index=False):
            pml[float(rp)] = float(loss_at)
    return out, pml


def finished_runs(output):
    """The finished run folders of an output folder, oldest first (the order of :func:`run_history`).

    Parameters
    ----------
    output : path-like
        An output folder holding ``runs/``.

    Returns
    -------
    list of pathlib.Path

    Raises
    ------
    InputError
        When ``output`` has no ``runs/`` folder.
    """
    return _runs(output)


def headline_figures(run):
    """The headline figures of one run, as :func:`run_history` lists them.

    Parameters
    ----------
    run : quakefolio.pipeline.io.store.RunFolder
        A run folder (or the report's view of one, tables in memory included).

    Returns
    -------
    figures : dict
        :data:`HEADLINE` name -> value (``classical_eal`` [currency/yr] ...; NaN where the run
        lacks it).
    pml : dict
        Return period [yr] -> ground-up aggregate PML [currency] of the event-based stage.
    """
    return _headline(run)


def changed_inputs(before, after):
    """``role: path`` of every input file whose sha256 differs between two run manifests ("; "-joined).

    Parameters
    ----------
    before, after : dict
        Run manifests.

    Returns
    -------
    str
    """
    return _changed_inputs(before, after)


def _changed_inputs(before, after):
    """``role: path`` of every input file whose sha256 differs between two manifests."""
    a, b = before.get("inputs") or {}, after.get("inputs") or {}
    out = []
    for role in sorted(set(a) | set(b)):
        ra, rb = a.get(role) or {}, b.get(role) or {}
        if ra.get("sha256") == rb.get("sha256"):
            continue
        path = rb.get("path") or ra.get("path") or ""
        mark = " (added)" if not ra else " (removed)" if not rb else ""
        out.append(f"{role}: {os.path.basename(path) if os.path.isabs(path) else path}{mark}")
    return "; ".join(out)


def _pml_column(rp):
    return f"pml_aep_{np.format_float_positional(rp, trim='-')}yr"


def _percent(new, old):
    if not (math.isfinite(new) and math.isfinite(old)) or old == 0:
        return math.nan
    return 100.0 * (new - old) / abs(old)


def run_history(output):
    """The history table of an output folder (see the module notes).

    Parameters
    ----------
    output : path-like
        An output folder holding ``runs/``.

    Returns
    -------
    (pandas.DataFrame, str)
        One row per finished run, oldest first, and the currency of the newest run ("" when
        none is named).

    Raises
    ------
    InputError
        When ``output`` is not an output folder or holds no finished run.
    """
    runs = [RunFolder(p) for p in _runs(output)]
    if not runs:
        raise InputError(output, "holds no finished run (runs/ has no run folder with a manifest)")
    rows, pmls = [], []
    for run in runs:
        figures, pml = _headline(run)
        rows.append({"run_id": run.run_id, "created_utc": str(run.manifest.get("created_utc", run.run_id[:16])),
                     "scenario": str(run.scenario), "stages": str(run.manifest.get("stages", "")),
                     "inputs_sha256": str(run.manifest.get("inputs_sha256", "")), **figures})
        pmls.append(pml)
    periods = sorted({rp for pml in pmls for rp in pml})
    for row, pml in zip(rows, pmls):
        row.update({_pml_column(rp): pml.get(rp, math.nan) for rp in periods})
    figures = [*HEADLINE, *(_pml_column(rp) for rp in periods)]
    for i, row in enumerate(rows):
        prev = rows[i - 1] if i else None
        row["changed_inputs"] = _changed_inputs(runs[i - 1].manifest, runs[i].manifest) if i else ""
        for name in figures:
            row[f"{name}_change_pct"] = _percent(row[name], prev[name]) if prev else math.nan
    return pd.DataFrame(rows), runs[-1].currency


def _units(frame, currency):
    units = {}
    for c in frame.columns:
        if c.endswith("_change_pct"):
            units[c] = "%"
        elif c.startswith("pml_aep_"):
            units[c] = currency
        elif c in HEADLINE:
            units[c] = HEADLINE[c].replace("{currency}", currency)
    return units


def _is_our_history(path):
    try:
        meta = pq.read_schema(path).metadata or {}
    except (OSError, ValueError):
        return False
    return b"run_history" in meta.get(METADATA_KEY, b"")


def write_history(output, frame, currency):
    """Write ``<output>/history.parquet`` atomically; return its path.

    Parameters
    ----------
    output : path-like
        The output folder.
    frame : pandas.DataFrame
        From :func:`run_history`.
    currency : str
        Currency code of the money columns.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    OutputError
        When a file of that name exists and is not a history table of ours, or the folder
        cannot be written.
    """
    path = Path(os.path.abspath(output)) / HISTORY_FILE
    if os.path.lexists(path) and (path.is_symlink() or not path.is_file() or not _is_our_history(path)):
        raise OutputError(path, "exists and is not a quakefolio run history; it is left alone")
    table = to_arrow(frame, name=_TABLE, units=_units(frame, currency),
                     description="One row per finished run of the output folder, oldest first: headline figures and "
                                 "what changed since the run before.",
                     provenance={"runs": len(frame)})
    sink = io.BytesIO()
    pq.write_table(table, sink, compression="zstd")
    try:
        return atomic_write_bytes(path, sink.getvalue())
    except OSError as exc:
        raise OutputError(path, f"cannot write the history: {(exc.strerror or 'error').lower()}") from None


def _money(v, currency):
    return "n/a" if not math.isfinite(v) else f"{v:,.0f} {currency}".strip()


def _pct(v):
    return "" if not math.isfinite(v) else f" ({v:+.1f} %)"


def history_text(frame, currency, path):
    """The history as printed lines: an aligned table, figures with their change in percent.

    Parameters
    ----------
    frame : pandas.DataFrame
        From :func:`run_history`.
    currency : str
    path : path-like
        Where the table was written (named on the last line).

    Returns
    -------
    str
    """
    pml = [c for c in frame.columns if c.startswith("pml_aep_") and not c.endswith("_change_pct")]
    head = ["run", f"EAL [{currency}/yr]", f"AAL [{currency}/yr]",
            *(f"PML {c.removeprefix('pml_aep_')} [{currency}]" for c in pml), "collapses in horizon"]
    rows, notes = [], {}
    for i, row in enumerate(frame.to_dict("records")):
        collapses = row["expected_collapses_in_horizon"]
        rows.append([row["run_id"],
                     _money(row["classical_eal"], "") + _pct(row["classical_eal_change_pct"]),
                     _money(row["event_aal"], "") + _pct(row["event_aal_change_pct"]),
                     *(_money(row[c], "") + _pct(row[f"{c}_change_pct"]) for c in pml),
                     ("n/a" if not math.isfinite(collapses) else f"{collapses:.3g}")
                     + _pct(row["expected_collapses_in_horizon_change_pct"])])
        if i:
            notes[i] = f"changed inputs: {row['changed_inputs']}" if row["changed_inputs"] else "no input file changed"
    widths = [max(len(r[j]) for r in [head, *rows]) for j in range(len(head))]
    lines = ["  ".join(h.ljust(w) if j == 0 else h.rjust(w) for j, (h, w) in enumerate(zip(head, widths)))]
    for i, cells in enumerate(rows):
        lines.append("  ".join(c.ljust(w) if j == 0 else c.rjust(w) for j, (c, w) in enumerate(zip(cells, widths))))
        if i in notes:
            lines.append(f"    {notes[i]}")
    lines.append(f"{len(frame)} run(s), oldest first; changes in % of the run before; table written to {path}")
    return "\n".join(lines)
