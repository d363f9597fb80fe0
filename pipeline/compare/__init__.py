"""Change report between two finished runs: what moved, and which input moved it.

After a hazard, fragility or exposure update the engineer reruns the portfolio and has to
explain every difference.  :func:`compare_runs` reads two run folders (never writing to
them) and returns

``change_assets``
    one row per asset of the union of both runs: status (``added``, ``removed``,
    ``kept``), class, site and value in each run, EAL and collapse probability in the
    horizon in A and B with their changes, the exact split of the EAL change into a
    value part and a loss-ratio part, the cause flags and the primary cause;
``change_asset_damage``
    one row per asset and damage state (long form): annual exceedance rate and
    probability in the horizon in A and B with absolute and relative changes;
``change_portfolio``
    portfolio totals (asset count, value, classical EAL) and, when both runs carry the
    event-based tables, AAL with its standard errors and PML (AEP and OEP) and TVaR per
    return period and basis;
``change_causes``
    a JSON-ready dict: which input files changed (by role, from the manifests' sha256),
    which building classes' fragility changed, at how many hazard sites the curves
    changed, which settings changed, seed and years, counts per primary cause.

:func:`write_change_report` writes them to
``<output folder of RUN_B>/comparisons/<run_a_id>__<run_b_id>/`` (or under another
folder), atomically.

Run arguments
-------------
``run_a`` and ``run_b`` are a run folder (``<output>/runs/<run_id>``, the one holding
``manifest.json``) or an output folder, which stands for the run its ``LATEST`` pointer
names.  Runs of different scenarios or portfolios can be compared; the report says so.

Cause attribution (per asset)
-----------------------------
``cause_hazard``
    the hazard curves at the asset's site for its class's IM differ (same site id; the
    curve's ``(im_level, annual_rate)`` points equal within a relative
    :data:`HAZARD_RTOL`; for an IM interpolated across periods, the two neighbouring
    tabulated periods are compared), or the asset is assigned to another site, or its
    distance to the site changed while the exposure file did not (the site moved).
``cause_fragility``
    the parameter digest of the asset's building class differs between the manifests
    (``fragility_classes``); without digests in a manifest, the library file's sha256.
``cause_exposure``
    the asset was added or removed, or its replacement value, building class, site
    assignment or site distance differ (the last two only when the exposure file itself
    changed).
``cause_settings``
    a resolved config setting that acts on per-asset results differs (file paths,
    execution, labels and settings of other tables excluded; see :data:`SETTING_SCOPES`).

``causes`` lists the flagged causes in order and ``primary_cause`` is its first entry.
The order: when the exposure flag comes from a changed replacement value and the value
part of the EAL change is at least as large as the loss-ratio part (the split is exact,
``eal_change = eal_change_from_value + eal_change_from_ratio``), ``exposure`` leads; the
rest follow the fixed order hazard, fragility, exposure, settings.  An asset whose
results did not change (relative :data:`RESULT_RTOL`) and that has no cause is
``unchanged``; one whose results changed with no cause found is ``unexplained`` (for
example a different code version; the report lists package versions that differ).  A
flagged cause is named even where the results did not move (``results_changed`` tells).

Layout: :mod:`~quakefolio.pipeline.compare.diff` (reading runs, differences),
:mod:`~quakefolio.pipeline.compare.attribution` (causes, :func:`compare_runs`),
:mod:`~quakefolio.pipeline.compare.render` (the report folder and the printed text).
"""
from __future__ import annotations

from quakefolio.pipeline.compare.attribution import compare_runs
from quakefolio.pipeline.compare.diff import CAUSES, HAZARD_RTOL, RESULT_RTOL, SETTING_SCOPES, resolve_run
from quakefolio.pipeline.compare.render import change_summary_text, write_change_report

__all__ = ["compare_runs", "write_change_report", "resolve_run", "change_summary_text", "CAUSES",
           "HAZARD_RTOL", "RESULT_RTOL", "SETTING_SCOPES"]
