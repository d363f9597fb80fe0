"""Report section: the trend of the headline figures across the runs of the output folder (a scheduled rerun's
report shows how EAL, AAL and PML moved from run to run)."""
from __future__ import annotations

import math

import numpy as np

from quakefolio.core.errors import InputError
from quakefolio.pipeline.history import changed_inputs, finished_runs, headline_figures
from quakefolio.pipeline.io.store import RunFolder
from quakefolio.pipeline.report.figures import _RC, _SERIES, _figure_html, _new_figure
from quakefolio.pipeline.report.html import _cell, _money, _note, _p, _table

__all__ = ["TREND_RUNS", "trend_frame", "_section_trend"]

#: The trend shows at most this many runs: the report's run and the latest earlier ones.
TREND_RUNS = 12


def _stamp(run_id):
    return str(run_id)[:16]


def _earlier_runs(run):
    """Finished runs of the run's output folder created before it (or at its second), oldest first; the
    run itself is left out (it is added from the report's own view)."""
    if run.path.parent.name != "runs":
        return []
    try:
        found = finished_runs(run.path.parent.parent)
    except InputError:
        return []
    out = []
    for p in found:
        if p.name == run.run_id:
            break
        if _stamp(p.name) <= _stamp(run.run_id):
            out.append(p)
    return out[-(TREND_RUNS - 1):]


def trend_frame(run):
    """The headline figures of the runs of the output folder up to ``run``, oldest first.

    Parameters
    ----------
    run : ReportRun
        The report's run, finished or being written in ``<output>/runs/``.

    Returns
    -------
    pandas.DataFrame
        One row per run (at most :data:`TREND_RUNS`: the run and the latest earlier ones):
        ``run_id``, ``created_utc``, ``changed_inputs`` (input files changed since the row
        before), ``classical_eal`` and ``event_aal`` [currency/yr], ``expected_collapses_in_horizon``
        [-] and one ``pml_<T>`` [currency] per return period T of any run listed (NaN where a
        run lacks it): the figures of :func:`quakefolio.pipeline.history.headline_figures`.
    """
    import pandas as pd

    folders = [RunFolder(p) for p in _earlier_runs(run)] + [run]
    rows, periods = [], set()
    for k, folder in enumerate(folders):
        figures, pml = headline_figures(folder)
        periods |= set(pml)
        rows.append({"run_id": folder.run_id, "created_utc": str(folder.manifest.get("created_utc", "")),
                     "changed_inputs": changed_inputs(folders[k - 1].manifest, folder.manifest) if k else "",
                     "classical_eal": figures["classical_eal"], "event_aal": figures["event_aal"],
                     "expected_collapses_in_horizon": figures["expected_collapses_in_horizon"], "_pml": pml})
    for row in rows:
        pml = row.pop("_pml")
        row.update({f"pml_{rp:g}": pml.get(rp, math.nan) for rp in sorted(periods)})
    return pd.DataFrame(rows)


def _trend_figure(frame, cur):
    """EAL and AAL per run (left) and, where any run has them, PML per return period per run (right)."""
    from matplotlib.ticker import FuncFormatter

    pml = [c for c in frame.columns if c.startswith("pml_") and np.isfinite(frame[c].to_numpy(float)).any()]
    panels = [([("classical_eal", "EAL, classical"), ("event_aal", "AAL, event-based")], f"annual loss [{cur}/yr]")]
    if pml:
        panels.append(([(c, f"PML {c[4:]} yr") for c in pml], f"aggregate PML, ground-up [{cur}]"))
    fig = _new_figure(4.8 * len(panels), 3.2)
    axes = fig.subplots(1, len(panels), squeeze=False).ravel()
    x = np.arange(len(frame))
    money = FuncFormatter(lambda v, _pos: f"{v:,.0f}")  # whole currency units, as in the table
    for ax, (columns, title) in zip(axes, panels):
        for k, (col, label) in enumerate(columns):
            y = frame[col].to_numpy(float)
            if np.isfinite(y).any():
                ax.plot(x, y, marker="o", markersize=4, color=_SERIES[k % len(_SERIES)], label=label)
        ax.yaxis.set_major_formatter(money)
        ax.set_ylabel(title)
        ax.set_xlabel("run (oldest first, numbered as in the table)")
        ax.set_xticks(x, [str(i + 1) for i in x])
        ax.legend(loc="best")
    return fig


def _trend_figure_html(frame, cur, cache):
    """The trend figure as HTML; with ``cache``, taken from it when the same figures were drawn before.

    The figure shows the runs' numbers only (x: the runs numbered from the oldest), so a
    scheduled rerun of unchanged inputs draws it once the trend holds :data:`TREND_RUNS` runs
    of the same figures; matplotlib is then not imported at all.
    """
    plotted = [c for c in frame.columns if c in ("classical_eal", "event_aal") or c.startswith("pml_")]
    key = None
    if cache is not None:
        from quakefolio.pipeline.io.cache import digest

        key = digest("report-trend-figure", cur, plotted, frame[plotted].to_numpy(float))
        found = cache.get("report", key)
        if found is not None:
            return found["html"].tobytes().decode("utf-8")
    import matplotlib

    with matplotlib.rc_context(_RC):
        html = _figure_html(_trend_figure(frame, cur), "trend of EAL, AAL and PML across runs",
                            f"Figure: classical EAL and event-based AAL [{cur}/yr]; beside it, where the runs simulated "
                            f"events, the ground-up aggregate PML per return period [{cur}]; x: the runs of the table "
                            "above, oldest first. A missing point: the run has no such figure (no event stage, another "
                            "return period).")
    if key is not None:
        cache.put("report", key, {"html": np.frombuffer(html.encode("utf-8"), dtype=np.uint8)})
    return html


def _section_trend(run, cache=None):
    """Section: headline figures of the output folder's runs up to this one, as a table and a plot.

    Not cached with the table-drawn sections: it depends on the other runs of the folder
    (its figure is, by the numbers it shows: :func:`_trend_figure_html`).

    Parameters
    ----------
    run : ReportRun
    cache : quakefolio.pipeline.io.cache.StageCache, optional
        The content cache of the run's output folder.

    Returns
    -------
    str
        HTML of the section body; a note when the output folder holds no earlier run.
    """
    frame = trend_frame(run)
    if len(frame) < 2:
        return _note("No earlier run in this output folder: the trend of the headline figures appears once it holds "
                     "more than one run (for instance after a scheduled rerun, quakefolio schedule).")
    cur = run.currency
    pmls = [c for c in frame.columns if c.startswith("pml_")]
    rows = []
    for k, r in enumerate(frame.itertuples(index=False)):
        d = r._asdict()
        rows.append([str(k + 1), r.run_id + (" (this run)" if k == len(frame) - 1 else ""),
                     _cell(_money(r.classical_eal), r.classical_eal), _cell(_money(r.event_aal), r.event_aal)]
                    + [_cell(_money(d[c]), d[c]) for c in pmls]
                    + [_cell(f"{r.expected_collapses_in_horizon:,.2f}", r.expected_collapses_in_horizon),
                       r.changed_inputs or ("" if k == 0 else "none (settings or code)")])
    first, last = frame.iloc[0], frame.iloc[-1]
    change = ("n/a" if not (first.classical_eal and math.isfinite(first.classical_eal)) else
              f"{100 * (last.classical_eal - first.classical_eal) / abs(first.classical_eal):+.1f}%")
    out = [_p(f"The headline figures of the {len(frame)} runs of this output folder up to this one (oldest first; "
              f"at most {TREND_RUNS}): classical EAL, event-based AAL and the ground-up aggregate PML, with the "
              f"input files changed since the run before. The classical EAL moved by {change} from the first run "
              "listed to this one. quakefolio history OUTPUT lists every run of the folder."),
           _table(["#", "run", f"EAL [{cur}/yr]#", f"AAL [{cur}/yr]#"]
                  + [f"PML {c[4:]} yr [{cur}]#" for c in pmls]
                  + ["expected collapses#", "inputs changed since the run before"], rows),
           _trend_figure_html(frame, cur, cache)]
    return "".join(out)
