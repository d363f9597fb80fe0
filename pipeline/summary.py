"""The short printed summary of a finished run."""
from __future__ import annotations

import json
from pathlib import Path

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.store import read_table

__all__ = ["summary_text"]


def _money(x):
    return f"{x:,.0f}"


def _hazard_lines(run_dir, manifest):
    """Range over sites of the mean uniform-hazard values, and disaggregation at the worst site."""
    uhs = read_table(run_dir, "hazard_at_return_periods")
    stat = "mean" if "mean" in set(uhs.statistic) else uhs.statistic.iloc[0]
    uhs = uhs[uhs.statistic == stat]
    tree = manifest.get("hazard_logic_tree")
    lines = [""]
    if tree:
        lines.append(f"  hazard computed at {manifest['hazard_sites']} sites: "
                     f"{len(tree['source_branches'])} source-model x {len(tree['gmm_branches'])} ground-motion "
                     f"branches ({sum(b['ruptures'] for b in tree['source_branches'])} ruptures in all)")
    else:
        lines.append(f"  hazard tabulated at {manifest['hazard_sites']} sites")
    lines.append(f"  {stat} uniform-hazard IM [g] across sites (min / median / max):")
    for (im, rp), grp in uhs.groupby(["im", "return_period_yr"], sort=True):
        v = grp.im_level.dropna()
        if len(v):
            lines.append(f"    {im:<8} {rp:>6g} yr   {v.min():.3f} / {v.median():.3f} / {v.max():.3f}"
                         + ("" if len(v) == len(grp) else f"   ({len(grp) - len(v)} sites flagged)"))
        else:
            lines.append(f"    {im:<8} {rp:>6g} yr   not reported ({grp.flag.iloc[0]})")
    if (Path(run_dir) / "disaggregation_summary.parquet").exists():
        dis = read_table(run_dir, "disaggregation_summary").dropna(subset=["mean_mag"])
        if len(dis):
            worst = dis.sort_values(["im_level", "site_id"], ascending=[False, True]).iloc[0]
            lines.append(f"  disaggregation at the highest {worst.im} ({worst.return_period_yr:g} yr, site "
                         f"{worst.site_id}): mean M {worst.mean_mag:.2f}, mean Rrup {worst.mean_dist_km:.1f} km, "
                         f"mean epsilon {worst.mean_eps:.2f}")
    return lines


def summary_text(run_dir, *, elapsed_s=None):
    run_dir = Path(run_dir)
    manifest = json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))
    cfg = manifest["config"]
    cur = cfg["scenario"]["currency"]
    horizon = cfg["scenario"]["horizon_yr"]
    top_n = cfg["output"]["top_assets"]
    head = [CAUTION, "", f"quakefolio run {manifest['run_id']}  scenario: {manifest['scenario']}"]
    hazard = _hazard_lines(run_dir, manifest)
    timing = f" in {elapsed_s:.1f} s" if elapsed_s is not None else ""
    if manifest.get("stages") == "hazard":
        return "\n".join(head + hazard + ["", f"  run folder (hazard stage only){timing}: {run_dir}"])
    loss = read_table(run_dir, "asset_loss")
    total_value = loss.replacement_value.sum()
    eal = loss.eal.sum()
    lines = head + [
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
    lines += hazard
    lines.append("")
    lines.append(f"  run folder{timing}: {run_dir}")
    return "\n".join(lines)
