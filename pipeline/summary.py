"""The short printed summary of a finished run."""
from __future__ import annotations

import json
from pathlib import Path

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.store import read_table

__all__ = ["summary_text"]


def _money(x):
    return f"{x:,.0f}"


def summary_text(run_dir, *, elapsed_s=None):
    run_dir = Path(run_dir)
    manifest = json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))
    cfg = manifest["config"]
    cur = cfg["scenario"]["currency"]
    horizon = cfg["scenario"]["horizon_yr"]
    top_n = cfg["output"]["top_assets"]
    loss = read_table(run_dir, "asset_loss")
    total_value = loss.replacement_value.sum()
    eal = loss.eal.sum()
    lines = [
        CAUTION,
        "",
        f"quakefolio run {manifest['run_id']}  scenario: {manifest['scenario']}",
        f"  assets {len(loss)}   classes {loss.building_class.nunique()}   hazard sites used "
        f"{loss.site_id.nunique()}   total replacement value {_money(total_value)} {cur}",
        f"  portfolio EAL (classical, sum of per-asset EAL) {_money(eal)} {cur}/yr  "
        f"({1000 * eal / total_value:.3f} per mille of value)",
        "",
        f"  {top_n} assets with the highest collapse probability in {horizon:g} years:",
        f"  {'asset_id':<12}{'class':<10}{'site':<8}{'collapse/yr':>13}{'P(' + format(horizon, 'g') + ' yr)':>12}"
        f"{'EAL ' + cur:>14}",
    ]
    top = loss.sort_values(["collapse_prob_in_horizon", "asset_id"], ascending=[False, True]).head(top_n)
    for r in top.itertuples():
        lines.append(f"  {r.asset_id:<12}{r.building_class:<10}{r.site_id:<8}{r.annual_collapse_rate:>13.3e}"
                     f"{r.collapse_prob_in_horizon:>12.4f}{_money(r.eal):>14}")
    for w in manifest.get("warnings", []):
        lines.append(f"  note: {w}")
    lines.append("")
    timing = f" in {elapsed_s:.1f} s" if elapsed_s is not None else ""
    lines.append(f"  run folder{timing}: {run_dir}")
    return "\n".join(lines)
