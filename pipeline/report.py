"""The HTML report of a run: one self-contained file for decision support.

:func:`build_report` reads the tables and ``manifest.json`` of one run folder (a finished
run, or a partial folder still being written: only the folder given is read) and returns
one HTML document.  Everything it needs is inside it: the style sheet inline, every plot
an inline base64 PNG drawn with matplotlib's Agg renderer (no pyplot, no global backend
switch), a few lines of inline JavaScript that sort tables by a click on a column
header; no external URL, font or script, so the file opens offline and can be mailed.

The report opens with the caution (:data:`quakefolio.pipeline.caution.CAUTION`), then a
band of key figures, then one ``<section id="...">`` per topic (:data:`SECTIONS`).  A
section whose tables are absent from the run (an ingest-mode run has no
disaggregation; a run without the event-based stage has no portfolio loss curves) is
still present, holding a note that says why.  A section that fails to draw holds a note
with the error instead of breaking the whole report.

:func:`write_report` writes it atomically (temporary file in the target folder, then
``os.replace``).
"""
from __future__ import annotations

import base64
import datetime as _dt
import hashlib
import html
import io
import json
import math
import os
import re
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from quakefolio.core.errors import InputError
from quakefolio.core.ims import im_period
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.store import PARTIAL_PREFIX, read_manifest, read_table

__all__ = ["build_report", "write_report", "SECTIONS", "MAX_TABLE_ROWS", "TOP_ASSETS"]

#: Section ids and headings, in report order.
SECTIONS = (
    ("inputs", "Inputs and provenance"),
    ("hazard", "Seismic hazard at the sites"),
    ("fragility", "Fragility curves by building class"),
    ("damage", "Damage-state rates and probabilities per asset"),
    ("riskiest", "The riskiest assets"),
    ("portfolio", "Portfolio loss: exceedance curves, AAL, PML and TVaR"),
    ("screening", "Collapse-risk screening"),
    ("whatif", "Retrofit what-if and benefit-cost"),
    ("map", "Map of assets"),
    ("changes", "Changes since the previous run"),
    ("checks", "Built-in cross-checks and hazard logic tree"),
)

#: The screening section lists at most this many flagged assets (the table holds them all).
SCREENING_ROWS = 50

#: The per-asset table lists at most this many assets (highest collapse probability first).
MAX_TABLE_ROWS = 500

#: Number of assets in the "riskiest assets" table.
TOP_ASSETS = 20

#: Resolution of the embedded PNG figures [dots per inch].
DPI = 100

# A restrained palette of our own: ink and greys for structure, four muted hues for data.
_INK = "#1d2733"
_MUTED = "#5b6675"
_GRID = "#e4e7eb"
_TEAL = "#1f6f78"
_OCHRE = "#b7791f"
_PLUM = "#6a4c7d"
_BRICK = "#9b3b2f"
_OLIVE = "#5f6f2a"
_SERIES = (_TEAL, _OCHRE, _PLUM, _BRICK, _OLIVE)
#: damage-state colours, least to most severe
_STATES = ("#d9b44a", "#c97d2c", "#a8482f", "#4a1f1a", "#7d7d7d", "#2e3a48")

_RC = {
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "axes.edgecolor": _MUTED,
    "axes.labelcolor": _INK,
    "axes.titlecolor": _INK,
    "axes.linewidth": 0.7,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": _GRID,
    "grid.linewidth": 0.6,
    "xtick.color": _MUTED,
    "ytick.color": _MUTED,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "legend.frameon": False,
    "legend.fontsize": 7.5,
    "lines.linewidth": 1.5,
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
}

_CSS = """
:root{--ink:#1d2733;--muted:#5b6675;--rule:#d5d9de;--paper:#fbfaf7;--teal:#1f6f78;--ochre:#b7791f;
--brick:#9b3b2f;--band:#f1efe9}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);
font:14px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif}
main{max-width:1120px;margin:0 auto;padding:0 28px 48px}
.caution{margin:0;max-width:none;padding:12px 28px;background:#f4e6e1;border-bottom:3px solid var(--brick);
color:#4a1f1a;font-weight:600;text-align:center}
header{padding:22px 0 8px;border-bottom:1px solid var(--rule)}
header h1{font-size:24px;margin:0 0 4px;font-weight:650;letter-spacing:-.01em}
header p{margin:2px 0;color:var(--muted)}
.keys{display:grid;grid-template-columns:repeat(auto-fit,minmax(160px,1fr));gap:10px;margin:18px 0}
.key{background:#fff;border:1px solid var(--rule);border-top:3px solid var(--teal);padding:8px 12px}
.key b{display:block;font-size:18px;font-variant-numeric:tabular-nums}
.key span{color:var(--muted);font-size:12px}
nav{margin:8px 0 0;font-size:13px}
nav ol{margin:0;padding:0;list-style:none;display:flex;flex-wrap:wrap;gap:4px 16px}
nav a{color:var(--teal);text-decoration:none}
nav a:hover{text-decoration:underline}
section{padding:18px 0 8px;border-bottom:1px solid var(--rule);counter-increment:sec}
section h2{font-size:19px;margin:0 0 10px;font-weight:650}
section h2::before{content:counter(sec) ". ";color:var(--teal)}
h3{font-size:15px;margin:18px 0 6px;font-weight:650}
p{margin:6px 0;max-width:78ch}
figure{margin:12px 0 16px;background:#fff;border:1px solid var(--rule);padding:8px}
figure img{display:block;max-width:100%;height:auto;margin:0 auto}
figcaption{color:var(--muted);font-size:12.5px;margin-top:6px;max-width:none}
.note{border-left:3px solid var(--ochre);background:#fbf5e8;padding:6px 10px;margin:8px 0;
color:#4d3a12;max-width:none}
.bad{color:var(--brick);font-weight:600}
.ok{color:var(--teal);font-weight:600}
.scroll{overflow:auto;max-height:560px;border:1px solid var(--rule);background:#fff;margin:8px 0}
table{border-collapse:collapse;font-size:12.5px;background:#fff;margin:8px 0}
.scroll table{margin:0}
th,td{padding:3px 9px;border-bottom:1px solid #eceef1;text-align:left;vertical-align:top}
th{background:var(--band);font-weight:600;position:sticky;top:0;white-space:nowrap}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
tbody tr:nth-child(even){background:#fafbfc}
table.sortable th{cursor:pointer;user-select:none}
table.sortable th::after{content:" \\2195";color:#a5adb8;font-weight:400}
table.sortable th[aria-sort=ascending]::after{content:" \\2191";color:var(--teal)}
table.sortable th[aria-sort=descending]::after{content:" \\2193";color:var(--teal)}
table.sortable th.group{cursor:default}
table.sortable th.group::after{content:none}
code,.mono{font-family:ui-monospace,"SF Mono",Menlo,Consolas,monospace;font-size:11.5px}
.mono{word-break:break-all}
table.wide{width:100%}
td{white-space:nowrap}
td.wrap{white-space:normal}
th.group{text-align:center;border-bottom:1px solid var(--rule);position:static}
.pair{display:flex;gap:24px;flex-wrap:wrap;align-items:flex-start}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:2px 16px;margin:8px 0}
dl.facts dt{color:var(--muted)}
dl.facts dd{margin:0}
footer{color:var(--muted);font-size:12px;padding:16px 0}
@media print{nav{display:none}.scroll{max-height:none;overflow:visible}figure,table{break-inside:avoid}}
"""

# Sort a table by the clicked header: numbers by their data-v attribute, text otherwise.
_JS = """
(function(){
function key(c){var v=c.getAttribute('data-v');if(v===null)return c.textContent.trim().toLowerCase();
var x=parseFloat(v);return isNaN(x)?-Infinity:x;}
document.querySelectorAll('table.sortable').forEach(function(t){
var hs=t.tHead.rows[t.tHead.rows.length-1].cells;
Array.prototype.forEach.call(hs,function(th,i){
th.tabIndex=0;
function go(){var asc=th.getAttribute('aria-sort')!=='ascending';
Array.prototype.forEach.call(hs,function(h){h.removeAttribute('aria-sort');});
th.setAttribute('aria-sort',asc?'ascending':'descending');
var b=t.tBodies[0],rows=Array.prototype.slice.call(b.rows);
rows.sort(function(r,s){var x=key(r.cells[i]),y=key(s.cells[i]);return (x<y?-1:x>y?1:0)*(asc?1:-1);});
rows.forEach(function(r){b.appendChild(r);});}
th.addEventListener('click',go);
th.addEventListener('keydown',function(e){if(e.key==='Enter'||e.key===' '){e.preventDefault();go();}});
});});
})();
"""


# --- formatting ------------------------------------------------------------------------------------

def _esc(x):
    return html.escape(str(x), quote=True)


def _finite(x):
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def _money(x, cur=""):
    """Whole currency units with thousands separators, e.g. ``4,559,725 USD``."""
    if not _finite(x):
        return "n/a"
    return f"{float(x):,.0f}" + (f" {cur}" if cur else "")


def _signed_money(x):
    return "n/a" if not _finite(x) else f"{float(x):+,.0f}"


def _rate(x):
    return "n/a" if not _finite(x) else f"{float(x):.3e}"


def _prob(x):
    return "n/a" if not _finite(x) else f"{float(x):.4f}"


def _pct(x, signed=False):
    if not _finite(x):
        return "n/a"
    return f"{100 * float(x):+.2f}%" if signed else f"{100 * float(x):.2f}%"


def _g(x, digits=3):
    return "n/a" if not _finite(x) else f"{float(x):.{digits}g}"


def _yr(x):
    return "n/a" if not _finite(x) else f"{float(x):,.6g} yr"


def _sv(x):
    """Sort value for a numeric cell (NaN sorts first)."""
    return f"{float(x):.9g}" if _finite(x) else "nan"


def _cell(text, value=None):
    """A numeric table cell: display text and the number it sorts by."""
    return ("n", text, _sv(value))


def _table(headers, rows, *, sortable=False, scroll=False, caption=None, groups=None, wide=False):
    """HTML table. ``headers``: labels (a label ending in ``#`` is a numeric column,
    shown without the mark). ``rows``: lists of cells, each a plain value (escaped),
    :func:`_cell` output (right-aligned, sorted numerically) or :func:`_html` output.
    ``groups``: optional ``[(label, n_columns), ...]`` header row above the labels."""
    top = ""
    if groups:
        top = "<tr>" + "".join(f"<th class=group colspan={n} scope=colgroup>{_esc(g)}</th>"
                               for g, n in groups) + "</tr>"
    hs = []
    for h in headers:
        num = h.endswith("#")
        hs.append(f'<th{" class=n" if num else ""} scope=col>{_esc(h[:-1] if num else h)}</th>')
    body = []
    for row in rows:
        cells = []
        for c in row:
            if isinstance(c, tuple) and len(c) == 3 and c[0] == "n":
                cells.append(f'<td class=n data-v="{c[2]}">{_esc(c[1])}</td>')
            elif isinstance(c, tuple) and len(c) == 2 and c[0] == "html":
                cells.append(f"<td class=wrap>{c[1]}</td>")
            else:
                text = str(c)
                cells.append(f"<td{' class=wrap' if len(text) > 28 else ''}>{_esc(text)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    classes = " ".join(c for c, on in (("sortable", sortable), ("wide", wide)) if on)
    cls = f' class="{classes}"' if classes else ""
    cap = f"<caption>{_esc(caption)}</caption>" if caption else ""
    out = f"<table{cls}>{cap}<thead>{top}<tr>{''.join(hs)}</tr></thead><tbody>{''.join(body)}</tbody></table>"
    return f'<div class="scroll">{out}</div>' if scroll else out


def _html(fragment):
    """A table cell holding trusted HTML (already escaped by the caller)."""
    return ("html", fragment)


def _note(text):
    return f'<p class="note">{_esc(text)}</p>'


def _p(text):
    return f"<p>{_esc(text)}</p>"


# --- figures -----------------------------------------------------------------------------------------

def _new_figure(width_in, height_in):
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), dpi=DPI, layout="constrained")


def _figure_html(fig, alt, caption):
    """Embed a figure as a base64 PNG with a caption; returns HTML."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{_esc(alt)}">'
            f"<figcaption>{_esc(caption)}</figcaption></figure>")


def _money_axis(ax, axis, cur):
    """Axis in millions of the currency, with thousands separators."""
    from matplotlib.ticker import FuncFormatter

    lo, hi = ax.get_ylim() if axis == "y" else ax.get_xlim()
    digits = 0 if max(abs(lo), abs(hi)) >= 1e7 else 1 if max(abs(lo), abs(hi)) >= 1e6 else 2
    fmt = FuncFormatter(lambda v, _pos: f"{v / 1e6:,.{digits}f}")
    (ax.yaxis if axis == "y" else ax.xaxis).set_major_formatter(fmt)
    label = f"loss [million {cur}]"
    (ax.set_ylabel if axis == "y" else ax.set_xlabel)(label)


# --- the run --------------------------------------------------------------------------------------------

class _Run:
    """One run folder (finished or partial) and its manifest, read lazily."""

    def __init__(self, run_dir):
        self.path = Path(run_dir)
        manifest_path = self.path / "manifest.json"
        if not self.path.is_dir():
            raise InputError(self.path, "no such run folder")
        if not manifest_path.is_file():
            raise InputError(manifest_path, "missing manifest.json: the report needs the run manifest")
        self.manifest = read_manifest(self.path)
        self.config = self.manifest.get("config") or {}
        self.run_id = self.manifest.get("run_id") or self.path.name
        self._tables = {}

    def section(self, name):
        return self.config.get(name) or {}

    @property
    def currency(self):
        return self.section("scenario").get("currency", "")

    @property
    def horizon(self):
        return float(self.section("scenario").get("horizon_yr", float("nan")))

    def has(self, name):
        return (self.path / f"{name}.parquet").is_file()

    def table(self, name):
        """The table as a DataFrame, or None when the run has no such table."""
        if name not in self._tables:
            self._tables[name] = read_table(self.path, name) if self.has(name) else None
        return self._tables[name]

    def hazard_statistic(self, available):
        hz = self.section("hazard")
        wanted = hz.get("statistic", "mean") if hz.get("mode") == "ingest" else "mean"
        if wanted in available:
            return wanted
        return "mean" if "mean" in available else sorted(available)[0]


def _fractile_stats(stats):
    """Fractile statistics (``p16``, ``p50``, ...) in increasing order."""
    out = []
    for s in stats:
        m = re.fullmatch(r"p(\d+(?:\.\d+)?)", str(s))
        if m:
            out.append((float(m.group(1)), s))
    return [s for _, s in sorted(out)]


def _period_key(im):
    try:
        return im_period(im)
    except ValueError:
        return float("inf")


# --- header ---------------------------------------------------------------------------------------------

def _key_figures(run):
    cur = run.currency
    keys = []
    loss = run.table("asset_loss")
    if loss is not None and len(loss):
        total = loss.replacement_value.sum()
        eal = loss.eal.sum()
        keys.append((f"{len(loss):,}", f"assets in {loss.building_class.nunique()} classes, "
                                       f"{loss.site_id.nunique()} hazard sites"))
        keys.append((_money(total, cur), "total replacement value"))
        keys.append((_money(eal, cur + "/yr"),
                     f"expected annual loss, classical ({1000 * eal / total:.3f} ‰ of value)"))
        worst = loss.sort_values(["collapse_prob_in_horizon", "asset_id"], ascending=[False, True]).iloc[0]
        keys.append((_prob(worst.collapse_prob_in_horizon),
                     f"highest probability of collapse in {run.horizon:g} yr (asset {worst.asset_id})"))
    summ = run.table("portfolio_summary")
    if summ is not None and "ground_up" in set(summ.basis):
        gu = summ.set_index("basis").loc["ground_up"]
        keys.append((_money(gu.aal, cur + "/yr"), f"AAL ground-up, event-based (± {_money(gu.aal_standard_error)} "
                                                  "1 s.e.)"))
    ep = run.table("portfolio_ep")
    if ep is not None and len(ep):
        gu = ep[ep.basis == "ground_up"].sort_values("return_period_yr")
        if len(gu):
            top = gu.iloc[-1]
            keys.append((_money(top.aep_loss, cur), f"PML {top.return_period_yr:,.0f} yr, ground-up aggregate"))
    if not keys:
        keys.append((f"{run.manifest.get('hazard_sites', 'n/a')}", "hazard sites (hazard stage only)"))
    return '<div class="keys">' + "".join(f'<div class="key"><b>{_esc(v)}</b><span>{_esc(t)}</span></div>'
                                          for v, t in keys) + "</div>"


def _created(run):
    stamp = run.manifest.get("created_utc") or ""
    try:
        return _dt.datetime.strptime(stamp, "%Y%m%dT%H%M%SZ").strftime("%Y-%m-%d %H:%M:%S UTC")
    except ValueError:
        return stamp or "n/a"


# --- 1. inputs and provenance --------------------------------------------------------------------------

def _file_status(path, sha):
    p = Path(path) if path else None
    if p is None or not p.is_file():
        return "missing now"
    h = hashlib.sha256()
    with open(p, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return "unchanged" if h.hexdigest() == sha else "changed since the run"


def _section_inputs(run):
    m = run.manifest
    sc = run.section("scenario")
    hz = run.section("hazard")
    facts = [
        ("scenario", m.get("scenario", sc.get("name", ""))),
        ("description", sc.get("description", "")),
        ("run id", run.run_id),
        ("created", _created(run)),
        ("stages run", "hazard only" if m.get("stages") == "hazard" else "hazard, damage and loss"
         + (", event-based portfolio" if run.has("portfolio_summary") else "")),
        ("hazard", "computed from the source model (logic tree)" if hz.get("mode") == "compute"
         else f"tabulated curves from file (statistic '{hz.get('statistic', 'mean')}')"),
        ("horizon", f"{run.horizon:g} yr (probabilities in this horizon assume Poisson occurrence)"),
        ("currency", run.currency),
        ("seed", m.get("seed") if m.get("seed") is not None else "none (no simulation)"),
        ("inputs digest (sha256)", m.get("inputs_sha256", "n/a")),
        ("run folder", str(run.path.parent / run.run_id)),  # the final name, also while being written
    ]
    interp = m.get("hazard_ims_interpolated") or []
    if interp:
        facts.append(("IMs interpolated across periods", ", ".join(interp)))
    out = ['<dl class="facts">' + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in facts) + "</dl>"]

    out.append("<h3>Input files</h3>")
    rows = []
    for role, info in sorted((m.get("inputs") or {}).items()):
        info = info or {}
        sha = info.get("sha256", "")
        rows.append([role, _html(f'<span class="mono">{_esc(info.get("path", ""))}</span>'),
                     _html(f'<span class="mono">{_esc(sha)}</span>'), _file_status(info.get("path"), sha)])
    out.append(_table(["role", "path", "sha256 at run time", "file now"], rows, wide=True) if rows
               else _note("The manifest lists no input files."))

    out.append("<h3>Software, timings and warnings</h3>")
    pk = m.get("packages") or {}
    tm = m.get("timings_s") or {}
    left = _table(["package", "version"], [[k, v if v is not None else "not installed"] for k, v in sorted(pk.items())])
    right = _table(["stage", "time [s]#"], [[k.removesuffix("_s").replace("_", " "), _cell(f"{v:,.2f}", v)]
                                            for k, v in tm.items()])
    out.append(f'<div class="pair">{left}{right}</div>')
    warnings = m.get("warnings") or []
    if warnings:
        out.append("<ul>" + "".join(f"<li>{_esc(w)}</li>" for w in warnings) + "</ul>")
    else:
        out.append(_p("Warnings raised while reading the inputs: none."))
    return "".join(out)


# --- 2. hazard -----------------------------------------------------------------------------------------

def _ranking_im(run, ims):
    """The IM that ranks the sites: the one most assets' fragility uses, else the shortest period."""
    dmg = run.table("asset_damage")
    if dmg is not None and len(dmg) and "im" in dmg.columns:
        counts = dmg.drop_duplicates("asset_id").im.value_counts()
        for im in counts.index:
            if im in ims:
                return im, "the IM the fragility of most assets uses"
    return sorted(ims, key=_period_key)[0], "the shortest-period IM"


def _choose_sites(run, curves, stat, im):
    """Highest-, median- and lowest-hazard site (or all if three or fewer).

    Ranked by the uniform-hazard IM at the largest return period with a value at every
    candidate site; else by the annual rate at the middle level of the IM grid.
    Candidates are the sites assets use, when the run has asset results.
    """
    sites = sorted(set(curves.site_id))
    loss = run.table("asset_loss")
    used = sorted(set(loss.site_id) & set(sites)) if loss is not None and len(loss) else []
    candidates = used or sites
    scope = "sites used by assets" if used else "hazard sites"
    score, basis = None, None
    uhs = run.table("hazard_at_return_periods")
    if uhs is not None and len(uhs):
        u = uhs[(uhs.im == im) & (uhs.statistic == stat) & uhs.site_id.isin(candidates)]
        for rp in sorted(set(u.return_period_yr), reverse=True):
            v = u[u.return_period_yr == rp].set_index("site_id").im_level
            if len(v) == len(candidates) and np.isfinite(v.to_numpy(float)).all():
                score, basis = v, f"{im} at {rp:,.0f} yr"
                break
    if score is None:
        c = curves[(curves.im == im) & curves.site_id.isin(candidates)]
        mid = float(np.exp(np.median(np.log(c.im_level[c.im_level > 0]))))
        vals = {}
        for site, g in c.groupby("site_id"):
            g = g.sort_values("im_level")
            r = np.clip(g.annual_rate.to_numpy(float), 1e-300, None)
            vals[site] = float(np.exp(np.interp(np.log(mid), np.log(g.im_level.to_numpy(float)), np.log(r))))
        score, basis = pd.Series(vals), f"annual rate of {im} exceeding {mid:.3g} g"
    score = score.sort_values(kind="stable")
    if len(score) <= 3:
        tags = {1: [""], 2: ["highest", "lowest"], 3: ["highest", "median", "lowest"]}[len(score)]
        chosen = list(zip(score.index[::-1], tags))
    else:
        chosen = [(score.index[-1], "highest"), (score.index[(len(score) - 1) // 2], "median"),
                  (score.index[0], "lowest")]
    return chosen, f"{len(candidates)} {scope} ranked by {basis}"


def _hazard_curves_figure(run, curves, stat, fractiles, chosen, ims):
    from matplotlib.ticker import FuncFormatter, NullLocator

    floor = float(run.section("hazard").get("rate_floor", 1e-6))
    rps = sorted(float(t) for t in run.section("hazard").get("return_periods_yr") or [])
    n = len(ims)
    ncols = 2 if n > 1 else 1
    nrows = math.ceil(n / ncols)
    fig = _new_figure(9.6 if ncols == 2 else 6.2, 3.3 * nrows + 0.3)
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    for ax in axes[n:]:
        ax.set_visible(False)
    for ax, im in zip(axes, ims):
        top = 0.0
        xmin, xmax = np.inf, 0.0
        for k, (site, tag) in enumerate(chosen):
            colour = _SERIES[k % len(_SERIES)]
            g = curves[(curves.site_id == site) & (curves.im == im)]
            main = g[g.statistic == stat].sort_values("im_level")
            if len(main):
                y = main.annual_rate.to_numpy(float)
                x = main.im_level.to_numpy(float)
                ax.plot(x, np.where(y > 0, y, np.nan), color=colour)
                top = max(top, float(np.nanmax(y)))
                xmin, xmax = min(xmin, x.min()), max(xmax, x.max())
            if len(fractiles) >= 2:
                lo = g[g.statistic == fractiles[0]].sort_values("im_level")
                hi = g[g.statistic == fractiles[-1]].sort_values("im_level")
                if len(lo) and len(lo) == len(hi):
                    ylo = lo.annual_rate.to_numpy(float)
                    yhi = hi.annual_rate.to_numpy(float)
                    ax.fill_between(lo.im_level.to_numpy(float), np.where(ylo > 0, ylo, np.nan),
                                    np.where(yhi > 0, yhi, np.nan), color=colour, alpha=0.18, linewidth=0)
            mid = [s for s in fractiles if s == "p50"]
            if mid:
                med = g[g.statistic == mid[0]].sort_values("im_level")
                if len(med):
                    y = med.annual_rate.to_numpy(float)
                    ax.plot(med.im_level.to_numpy(float), np.where(y > 0, y, np.nan), color=colour,
                            linestyle=(0, (4, 2)), linewidth=0.9)
        if not np.isfinite(xmin):
            ax.set_visible(False)
            continue
        bottom = floor / 30.0
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.yaxis.set_minor_locator(NullLocator())  # a decade grid is enough; minor ticks cost time
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_xlim(xmin, xmax)
        ax.set_ylim(bottom, max(top, 1.0 / min(rps) if rps else top) * 2.0)
        ax.axhspan(bottom, floor, color="#9aa3ad", alpha=0.22, linewidth=0, zorder=0)
        ax.text(0.02, floor / math.sqrt(30.0), f"below the rate floor {floor:.0e}/yr: not for design use",
                transform=ax.get_yaxis_transform(), fontsize=7, color=_INK, va="center")
        for t in rps:
            ax.axhline(1.0 / t, color=_INK, linewidth=0.6, linestyle=(0, (1, 2)))
            ax.text(0.995, 1.0 / t, f"{t:,.0f} yr", transform=ax.get_yaxis_transform(), ha="right", va="bottom",
                    fontsize=7, color=_INK)
        ax.set_title(im)
        ax.set_xlabel(f"{im} [g]")
        ax.set_ylabel("annual rate of exceedance [1/yr]")
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = [Line2D([], [], color=_SERIES[k % len(_SERIES)], label=f"{site}" + (f" ({tag})" if tag else ""))
               for k, (site, tag) in enumerate(chosen)]
    handles.append(Line2D([], [], color=_MUTED, label=f"{stat}"))
    if "p50" in fractiles:
        handles.append(Line2D([], [], color=_MUTED, linestyle=(0, (4, 2)), linewidth=0.9, label="p50"))
    if len(fractiles) >= 2:
        handles.append(Patch(color=_MUTED, alpha=0.25, linewidth=0, label=f"{fractiles[0]} to {fractiles[-1]}"))
    fig.legend(handles=handles, loc="outside upper center", ncol=len(handles))
    return fig


def _uhs_figure(run, uhs, stat, chosen):
    from matplotlib.ticker import FuncFormatter

    rps = sorted(set(uhs.return_period_yr))
    n = len(chosen)
    fig = _new_figure(min(3.4 * n + 0.6, 10.2), 3.1)
    axes = fig.subplots(1, n, squeeze=False, sharey=True).ravel()
    shades = ["#9cc5c9", "#5e9ea5", _TEAL, "#123f45", "#0a2326"]
    for ax, (site, tag) in zip(axes, chosen):
        g = uhs[(uhs.site_id == site) & (uhs.statistic == stat)].copy()
        g["period"] = g.im.map(_period_key)
        for k, rp in enumerate(rps):
            r = g[g.return_period_yr == rp].sort_values("period")
            colour = shades[min(k, len(shades) - 1)] if len(rps) <= len(shades) else None
            ax.plot(r.period, r.im_level, marker="o", markersize=3.5, color=colour, label=f"{rp:,.0f} yr")
        ax.set_xscale("log")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_xlabel("oscillator period [s] (PGA at 0.01 s)")
        ax.set_title(f"{site}" + (f" ({tag} hazard)" if tag else ""))
        ax.set_ylim(bottom=0)
    axes[0].set_ylabel(f"uniform-hazard IM, {stat} [g]")
    axes[-1].legend(title="return period", title_fontsize=7.5)
    return fig


def _bin_label(lo, hi, digits):
    if not np.isfinite(lo):
        return f"< {hi:.{digits}f}"
    if not np.isfinite(hi):
        return f"> {lo:.{digits}f}"
    return f"{lo:.{digits}f}–{hi:.{digits}f}"


def _disagg_figure(d, every):
    """Marginal shares of one disaggregation; ``every``: the rows whose bins define the axes."""
    fig = _new_figure(9.6, 2.9)
    axes = fig.subplots(1, 3)
    spec = (("mag_lo", "mag_hi", 1, "magnitude Mw", _TEAL),
            ("dist_lo_km", "dist_hi_km", 0, "distance Rrup [km]", _OCHRE),
            ("eps_lo", "eps_hi", 1, "epsilon [-]", _PLUM))
    for ax, (lo, hi, digits, label, colour) in zip(axes, spec):
        bins = every[[lo, hi]].drop_duplicates().sort_values(lo)
        m = bins.merge(d.groupby([lo, hi]).share.sum().reset_index(), on=[lo, hi], how="left").fillna({"share": 0.0})
        labels = [_bin_label(a, b, digits) for a, b in zip(m[lo], m[hi])]
        ax.bar(range(len(m)), 100 * m.share.to_numpy(float), color=colour, width=0.8)
        ax.set_xticks(range(len(m)), labels, rotation=45, ha="right", rotation_mode="anchor")
        ax.set_xlabel(label)
        ax.grid(axis="x", visible=False)
    axes[0].set_ylabel("share of exceedance rate [%]")
    return fig


def _section_hazard(run):
    cur_out = []
    curves = run.table("site_hazard")
    if curves is None or not len(curves):
        return _note("This run holds no site hazard table (site_hazard.parquet).")
    if "statistic" not in curves.columns:
        curves = curves.assign(statistic="mean")
    stats = set(curves.statistic)
    stat = run.hazard_statistic(stats)
    fractiles = _fractile_stats(stats)
    ims = sorted(set(curves.im), key=_period_key)
    rank_im, why = _ranking_im(run, ims)
    chosen, how = _choose_sites(run, curves[curves.statistic == stat], stat, rank_im)
    floor = float(run.section("hazard").get("rate_floor", 1e-6))
    n_sites = curves.site_id.nunique()
    cur_out.append(_p(
        f"Hazard curves are tabulated at {n_sites:,} sites for {len(ims)} intensity measures "
        f"({', '.join(ims)}; values in g). The sites shown: "
        + ", ".join(f"{s}" + (f" ({t})" if t else "") for s, t in chosen)
        + f"; chosen among {how} ({rank_im} being {why})."))
    band = (f"; shaded band: {fractiles[0]} to {fractiles[-1]} of the logic tree, dashed: p50"
            if len(fractiles) >= 2 else "")
    fig = _hazard_curves_figure(run, curves, stat, fractiles, chosen, ims)
    cur_out.append(_figure_html(
        fig, "hazard curves per intensity measure",
        f"Figure: annual rate of exceedance [1/yr] against intensity [g], log-log, {stat} curve{band}. "
        f"Dotted lines: configured return periods T at 1/T. Grey region: rates below the rate floor "
        f"{floor:.0e}/yr, not reported as design values (not for design use)."))

    uhs = run.table("hazard_at_return_periods")
    cur_out.append("<h3>Uniform-hazard spectra</h3>")
    if uhs is None or not len(uhs):
        cur_out.append(_note("This run holds no uniform-hazard table (hazard_at_return_periods.parquet)."))
    else:
        fig = _uhs_figure(run, uhs, stat, chosen)
        flagged = uhs[(uhs.statistic == stat) & uhs.site_id.isin([s for s, _ in chosen]) & uhs.im_level.isna()]
        extra = (f" {len(flagged)} value(s) at these sites are not reported (outside the tabulated curve or below "
                 "the rate floor) and are left out of the lines." if len(flagged) else "")
        cur_out.append(_figure_html(
            fig, "uniform-hazard spectra",
            f"Figure: uniform-hazard spectra ({stat}): the IM [g] with annual exceedance rate 1/T, against "
            f"oscillator period [s] on a log axis; PGA is plotted at 0.01 s.{extra}"))
        rows = []
        chosen_ids = [s for s, _ in chosen]
        u = uhs[(uhs.statistic == stat) & uhs.site_id.isin(chosen_ids)]
        rps = sorted(set(u.return_period_yr))
        for site in chosen_ids:
            for im in ims:
                r = u[(u.site_id == site) & (u.im == im)].set_index("return_period_yr")
                if not len(r):
                    continue
                cells = []
                for rp in rps:
                    if rp in r.index and _finite(r.im_level.loc[rp]):
                        cells.append(_cell(f"{r.im_level.loc[rp]:.3f}", r.im_level.loc[rp]))
                    else:
                        flag = str(r.flag.loc[rp]).replace("_", " ") if rp in r.index and "flag" in r.columns else ""
                        cells.append(_cell(f"— ({flag})" if flag else "—", float("nan")))
                rows.append([site, im] + cells)
        cur_out.append(_table(["site", "IM"] + [f"{rp:,.0f} yr [g]#" for rp in rps], rows))

    cur_out.append("<h3>Disaggregation</h3>")
    dis = run.table("disaggregation")
    if dis is None or not len(dis):
        cur_out.append(_note("No disaggregation in this run (it is computed for computed hazard only, "
                             "with hazard.disaggregation on)."))
    else:
        site = chosen[0][0]
        d = dis[dis.site_id == site]
        im = rank_im if rank_im in set(d.im) else (sorted(set(d.im), key=_period_key)[0] if len(d) else None)
        if im is None:
            cur_out.append(_note(f"No disaggregation rows for site {site}."))
        else:
            d = d[d.im == im]
            rp = max(set(d.return_period_yr))
            d = d[d.return_period_yr == rp]
            summ = run.table("disaggregation_summary")
            text = ""
            if summ is not None:
                s = summ[(summ.site_id == site) & (summ.im == im) & (summ.return_period_yr == rp)]
                if len(s):
                    s = s.iloc[0]
                    text = (f" Means: M {s.mean_mag:.2f}, Rrup {s.mean_dist_km:.1f} km, epsilon {s.mean_eps:.2f}; "
                            f"modes: M {s.mode_mag:.2f}, Rrup {s.mode_dist_km:.0f} km, epsilon {s.mode_eps:.2f}.")
            fig = _disagg_figure(d, dis)
            cur_out.append(_figure_html(
                fig, "disaggregation marginals",
                f"Figure: disaggregation of the mean exceedance rate of {im} = {d.im_level.iloc[0]:.3f} g "
                f"({rp:,.0f} yr) at site {site}: share [%] per magnitude, distance (Rrup, km) and epsilon bin "
                f"(bins of unequal width; shares below 1e-6 are not stored).{text}"))
    return "".join(cur_out)


# --- 3. fragility --------------------------------------------------------------------------------------

def _load_run_library(run):
    """The fragility library of the run and a list of notes; (None, notes) if unavailable."""
    from quakefolio.fragility import load_library

    info = (run.manifest.get("inputs") or {}).get("fragility_library") or {}
    path = info.get("path") or run.section("fragility").get("library")
    if not path:
        return None, ["The manifest names no fragility library file."], set()
    if not Path(path).is_file():
        return None, [f"The fragility library file {path} is no longer there: curves not drawn."], set()
    try:
        lib = load_library(path)
    except InputError as exc:
        return None, [f"The fragility library file no longer loads ({exc}): curves not drawn."], set()
    digests = run.manifest.get("fragility_classes")
    notes, stale = [], set()
    if isinstance(digests, dict):
        from quakefolio.pipeline.cache import fragility_class_digests

        now = fragility_class_digests(lib)
        stale = {c for c in digests if now.get(c) != digests[c]}
        if stale:
            notes.append(f"The library file {path} changed since the run: classes {', '.join(sorted(stale))} "
                         "differ from those the run used and are not drawn.")
    elif info.get("sha256") and getattr(lib, "sha256", None) != info.get("sha256"):
        notes.append(f"The library file {path} changed since the run (sha256 differs): curves not drawn.")
        return None, notes, set()
    return lib, notes, stale


def _section_fragility(run):
    lib, notes, stale = _load_run_library(run)
    out = [_note(n) for n in notes]
    if lib is None:
        return "".join(out)
    loss = run.table("asset_loss")
    used = sorted(set(loss.building_class)) if loss is not None and len(loss) else sorted(lib.classes)
    codes = [c for c in used if c in lib.classes and c not in stale]
    if not codes:
        out.append(_note("No building class of the run can be drawn."))
        return "".join(out)
    from matplotlib.ticker import FuncFormatter

    counts = loss.building_class.value_counts() if loss is not None else pd.Series(dtype=int)
    ncols = min(4, len(codes))
    nrows = math.ceil(len(codes) / ncols)
    fig = _new_figure(2.45 * ncols + 0.4, 2.2 * nrows + 0.5)
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    for ax in axes[len(codes):]:
        ax.set_visible(False)
    for ax, code in zip(axes, codes):
        dss = lib[code]
        xmin = float(dss.medians[0] * np.exp(-2.5 * dss.betas[0]))
        xmax = float(dss.medians[-1] * np.exp(2.5 * dss.betas[-1]))
        x = np.geomspace(xmin, xmax, 300)
        p = dss.probabilities(x)
        for j, name in enumerate(dss.names):
            colour = _STATES[j] if dss.n_states <= len(_STATES) else None
            ax.plot(x, p[:, j], color=colour, label=name)
        ax.set_xscale("log")
        ax.set_xlim(xmin, xmax)
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_ylim(0, 1.0)
        ax.set_title(f"{code}  ({counts.get(code, 0)} assets)")
        ax.set_xlabel(f"{dss.im} [g]")
        if ax.get_subplotspec().is_first_col():
            ax.set_ylabel("P(DS ≥ ds | IM) [-]")
    same_names = len({lib[c].names for c in codes}) == 1
    if same_names:
        fig.legend(handles=axes[0].get_lines(), loc="outside upper center", ncol=lib[codes[0]].n_states,
                   title="damage state (reached or exceeded)", title_fontsize=7.5)
    else:
        for ax in axes[:len(codes)]:
            ax.legend(loc="upper left", fontsize=6.5, handlelength=1.4)
    out.append(_figure_html(fig, "fragility curves per building class",
                            "Figure: lognormal fragility functions, probability of reaching or exceeding each "
                            "damage state [-] against the class's intensity measure [g] on a log axis (from the "
                            "first state's median / exp(2.5 beta) to the last state's median x exp(2.5 beta))."))
    rows = []
    for code in codes:
        dss = lib[code]
        for j, name in enumerate(dss.names):
            marked = j == dss.collapse_index and name.lower() != "collapse"
            rows.append([code if j == 0 else "", dss.im if j == 0 else "", name + (" (collapse state)" if marked else ""),
                         _cell(f"{dss.medians[j]:.3f}", dss.medians[j]), _cell(f"{dss.betas[j]:.2f}", dss.betas[j]),
                         _cell(f"{dss.mean_damage_ratio[j]:.3f}", dss.mean_damage_ratio[j]),
                         _cell(_g(dss.cov[j], 2), dss.cov[j])])
    out.append("<h3>Parameters</h3>")
    out.append(_table(["class", "IM", "damage state", "median [g]#", "beta [-]#", "mean damage ratio [-]#",
                       "loss-ratio CoV [-]#"], rows))
    descr = [(c, lib[c].description) for c in codes if getattr(lib[c], "description", "")]
    if descr:
        out.append("<p>" + "; ".join(f"<b>{_esc(c)}</b>: {_esc(d)}" for c, d in descr) + ".</p>")
    return "".join(out)


# --- 4. damage table -----------------------------------------------------------------------------------

def _section_damage(run):
    dmg = run.table("asset_damage")
    loss = run.table("asset_loss")
    if dmg is None or not len(dmg) or loss is None:
        return _note("This run holds no per-asset results (hazard stage only).")
    horizon = run.horizon
    idx = sorted(set(dmg.damage_state_index))
    names = dmg.groupby("damage_state_index").damage_state.agg(lambda s: sorted(set(s)))
    labels = {i: (names[i][0] if len(names[i]) == 1 else f"DS{i}") for i in idx}
    order = loss.sort_values(["collapse_prob_in_horizon", "asset_id"], ascending=[False, True]).asset_id
    shown = list(order[:MAX_TABLE_ROWS])
    rate = dmg.pivot_table(index="asset_id", columns="damage_state_index", values="annual_rate_exceed", aggfunc="first")
    prob = dmg.pivot_table(index="asset_id", columns="damage_state_index", values="prob_exceed_in_horizon",
                           aggfunc="first")
    meta = loss.set_index("asset_id")
    ims = dmg.drop_duplicates("asset_id").set_index("asset_id").im
    rows = []
    for a in shown:
        r = meta.loc[a]
        row = [a, r.building_class, r.site_id, ims.get(a, "")]
        for i in idx:
            v = rate.at[a, i] if a in rate.index and i in rate.columns else float("nan")
            row.append(_cell(_rate(v), v))
        for i in idx:
            v = prob.at[a, i] if a in prob.index and i in prob.columns else float("nan")
            row.append(_cell(_prob(v), v))
        rows.append(row)
    headers = ["asset", "class", "site", "IM"] + [f"{labels[i]}#" for i in idx] * 2
    groups = [("", 4), ("annual rate of reaching or exceeding [1/yr]", len(idx)),
              (f"probability in {horizon:g} yr [-]", len(idx))]
    out = [_p(f"Per asset and damage state: the annual rate of reaching or exceeding the state [1/yr] and the "
              f"probability of that in {horizon:g} years (Poisson, P = 1 - exp(-rate x {horizon:g})). Click a column "
              "header to sort.")]
    if len(names) and any(len(v) > 1 for v in names):
        per_class = dmg.drop_duplicates(["building_class", "damage_state_index"]).sort_values(
            ["building_class", "damage_state_index"])
        legend = "; ".join(f"{c}: " + ", ".join(f"DS{int(i)} = {n}"
                                                 for i, n in zip(g.damage_state_index, g.damage_state))
                           for c, g in per_class.groupby("building_class"))
        out.append(_note(f"Damage-state names differ between classes; columns are numbered by severity ({legend})."))
    if len(order) > MAX_TABLE_ROWS:
        out.append(_note(f"Showing {MAX_TABLE_ROWS:,} of {len(order):,} assets (highest collapse probability first); "
                         "every asset is in asset_damage.parquet of the run folder."))
    out.append(_table(headers, rows, sortable=True, scroll=True, groups=groups, wide=True))
    return "".join(out)


# --- 5. riskiest assets --------------------------------------------------------------------------------

def _section_riskiest(run):
    loss = run.table("asset_loss")
    if loss is None or not len(loss):
        return _note("This run holds no per-asset results (hazard stage only).")
    cur, h = run.currency, run.horizon
    top = loss.sort_values(["collapse_prob_in_horizon", "asset_id"], ascending=[False, True]).head(TOP_ASSETS)
    rows = [[r.asset_id, r.building_class, r.site_id, _cell(_money(r.replacement_value), r.replacement_value),
             _cell(_rate(r.annual_collapse_rate), r.annual_collapse_rate),
             _cell(_prob(r.collapse_prob_in_horizon), r.collapse_prob_in_horizon),
             _cell(_money(r.eal), r.eal), _cell(f"{1000 * r.eal_ratio:.3f}", r.eal_ratio)]
            for r in top.itertuples()]
    share = top.eal.sum() / loss.eal.sum() if loss.eal.sum() > 0 else float("nan")
    out = [_p(f"The {len(top)} assets with the highest probability of collapse in {h:g} years, with their expected "
              f"annual loss (classical). Together they carry {_pct(share)} of the portfolio EAL.")]
    out.append(_table(["asset", "class", "site", f"value [{cur}]#", "collapse rate [1/yr]#",
                       f"P(collapse in {h:g} yr)#", f"EAL [{cur}/yr]#", "EAL ratio [‰/yr]#"], rows, sortable=True))
    return "".join(out)


# --- collapse screening and what-if -------------------------------------------------------------------

def _section_screening(run):
    scr = run.table("collapse_screening")
    if scr is None or not len(scr):
        return _note("This run holds no screening table (hazard stage only).")
    target_p, target_t = float(scr.target_prob.iloc[0]), float(scr.target_years.iloc[0])
    flagged = scr[scr.exceeds_target].sort_values(["ratio_to_target", "asset_id"], ascending=[False, True])
    out = [_p(f"Each asset's annual collapse rate from this run, as a probability of collapse in {target_t:g} years "
              f"(Poisson), against the target of {_pct(target_p)} in {target_t:g} years (the risk target of "
              f"ASCE/SEI 7-16 Chapter 21). {len(flagged)} of {len(scr)} assets exceed it.")]
    by_class = scr.groupby("building_class").agg(n=("asset_id", "size"), over=("exceeds_target", "sum"),
                                                 worst=("ratio_to_target", "max")).sort_values("worst", ascending=False)
    out.append(_table(["class", "assets", "above the target", "largest ratio to target"],
                      [[c, int(r.n), int(r.over), f"{r.worst:.2f}"] for c, r in by_class.iterrows()],
                      caption="Buildings above the collapse-risk target, by class"))
    shown = flagged.head(SCREENING_ROWS)
    rows = [[r.asset_id, r.building_class, r.site_id, _cell(_rate(r.annual_collapse_rate), r.annual_collapse_rate),
             _cell(_prob(r.collapse_prob_in_target_years), r.collapse_prob_in_target_years),
             _cell(f"{r.ratio_to_target:.2f}", r.ratio_to_target)] for r in shown.itertuples()]
    if rows:
        out.append(_table(["asset", "class", "site", "collapse rate [1/yr]#",
                           f"P(collapse in {target_t:g} yr)#", "ratio to target#"], rows, sortable=True,
                          caption="Assets above the collapse-risk target, highest first" +
                                  (f" (first {len(shown)} of {len(flagged)}; all are in collapse_screening.parquet)"
                                   if len(flagged) > len(shown) else "")))
    rt = run.table("site_risk_targeted_im")
    if rt is not None and len(rt):
        rt = rt[rt.statistic == ("mean" if "mean" in set(rt.statistic) else rt.statistic.iloc[0])]
        used = set(run.table("asset_loss").site_id) if run.table("asset_loss") is not None else set(rt.site_id)
        rt = rt[rt.site_id.isin(used)]
        rows = []
        for im, grp in rt.groupby("im", sort=True):
            v, c = grp.risk_targeted_im_g.dropna(), grp.risk_coefficient.dropna()
            rows.append([im, len(grp), _g(v.min()) if len(v) else "n/a", _g(v.median()) if len(v) else "n/a",
                         _g(v.max()) if len(v) else "n/a",
                         f"{c.min():.2f} to {c.max():.2f}" if len(c) else "n/a"])
        out.append(_table(["IM", "sites", "risk-targeted IM, min [g]", "median [g]", "max [g]",
                           "risk coefficient (to the 2%-in-50-yr IM)"], rows,
                          caption="Risk-targeted IM at the sites used by the portfolio (generic collapse fragility "
                                  "of ASCE/SEI 7-16 Section 21.2.1.2: 10% collapse probability at the IM, "
                                  "dispersion as configured)"))
    return "".join(out)


def _section_whatif(run):
    port = run.table("whatif_portfolio")
    bc = run.table("whatif_benefit_cost")
    if port is None or not len(port):
        return _note("No retrofit alternative is configured for this run ([[scenario.alternatives]]).")
    cur = run.currency
    out = [_p("Each alternative assigns other building classes (retrofit designs) to a set of assets and recomputes "
              "their damage and loss with the same hazard and, for the event-based results, the same simulated "
              "events and ground motions. Amounts per year unless stated.")]
    for alt_id, grp in port.groupby("alternative_id", sort=False):
        rows = []
        for r in grp.itertuples():
            label = r.metric.replace("_", " ") + ("" if r.basis != r.basis or not r.basis else f" ({r.basis})")
            if r.return_period_yr == r.return_period_yr:
                label += f", {r.return_period_yr:g} yr"
            se = "" if r.standard_error_of_change != r.standard_error_of_change else \
                f" (± {_money(r.standard_error_of_change)})"
            rows.append([label, r.unit, _g(r.value_before, 4), _g(r.value_after, 4),
                         _g(r.change, 4) + se, _pct(r.relative_change, signed=True)])
        out.append(_table(["metric", "unit", "before", "after", "change", "relative"], rows,
                          caption=f"Alternative '{alt_id}': portfolio before and after"))
    if bc is not None and len(bc):
        tot = bc[bc.scope == "alternative"]
        rows = [[r.alternative_id, r.n_assets, _money(r.retrofit_cost), _money(r.avoided_eal),
                 f"{r.discount_rate:.1%}, {r.benefit_horizon_yr:g} yr", _money(r.pv_avoided_loss),
                 _money(r.net_present_value), f"{r.benefit_cost_ratio:.2f}",
                 _prob(r.avoided_annual_collapse_prob)] for r in tot.itertuples()]
        out.append(_table(["alternative", "assets", f"retrofit cost [{cur}]", f"avoided EAL [{cur}/yr]",
                           "discount, horizon", f"PV of avoided loss [{cur}]", f"NPV [{cur}]",
                           "benefit-cost ratio", "avoided annual collapse probability (sum)"], rows,
                          caption="Benefit-cost: present value of the avoided expected annual loss over the "
                                  "horizon (annuity factor (1 - (1 + r)^-T) / r) against the retrofit cost"))
    return "".join(out)


# --- 6. portfolio ---------------------------------------------------------------------------------------

def _thin_curve(c, n=600):
    """Points of an empirical EP curve at about ``n`` log-spaced return periods (plotting only)."""
    c = c.sort_values("return_period_yr")
    rp = c.return_period_yr.to_numpy(float)
    if len(rp) <= n:
        return c
    grid = np.geomspace(rp[0], rp[-1], n)
    pick = np.unique(np.clip(np.searchsorted(rp, grid), 0, len(rp) - 1))
    return c.iloc[pick]


def _section_portfolio(run):
    summ, ep = run.table("portfolio_summary"), run.table("portfolio_ep")
    if summ is None or ep is None:
        if run.manifest.get("stages") == "hazard":
            why = "this run is the hazard stage only"
        elif run.section("hazard").get("mode") != "compute":
            why = "hazard was tabulated from a file, and simulated events need a source model (computed hazard)"
        else:
            why = "the event-based stage is off ([portfolio] event_based = false)"
        return _note(f"No event-based tables in this run: {why}. Loss-exceedance curves, AAL, PML and TVaR of the "
                     "portfolio need the simulated event set; per-asset EAL above is classical.")
    cur = run.currency
    s = summ.set_index("basis")
    gu = s.loc["ground_up"] if "ground_up" in s.index else s.iloc[0]
    n_years = int(gu.n_years)
    out = [_p(f"{n_years:,} simulated years, {int(gu.n_events):,} events (source branch '{gu.source_branch}', seed "
              f"{int(gu.seed)}, loss model: {str(gu.loss_model).replace('_', ' ')}). Ground-up: before deductibles "
              f"and limits; net: after the per-asset policy terms.")]
    curve = run.table("portfolio_ep_curve")
    rps = sorted(set(ep.return_period_yr))
    if curve is not None and len(curve):
        fig = _new_figure(7.6, 3.8)
        ax = fig.subplots()
        styles = {("ground_up", "aep"): (_TEAL, "-"), ("ground_up", "oep"): ("#7fb9bf", (0, (3, 2))),
                  ("net", "aep"): (_OCHRE, "-"), ("net", "oep"): ("#e2bb6e", (0, (3, 2)))}
        for (basis, metric), g in curve.groupby(["basis", "metric"], sort=True):
            g = _thin_curve(g[g.loss > 0])
            colour, ls = styles.get((basis, metric), (_PLUM, "-"))
            ax.plot(g.return_period_yr, g.loss, color=colour, linestyle=ls, drawstyle="steps-post",
                    label=f"{metric.upper()} {basis.replace('_', '-')}")
        for t in rps:
            ax.axvline(t, color=_INK, linewidth=0.6, linestyle=(0, (1, 2)))
            ax.text(t, 1.005, f"{t:,.0f} yr", transform=ax.get_xaxis_transform(), ha="center", va="bottom",
                    fontsize=6.5, color=_INK)
        ax.axvspan(n_years / 10.0, curve.return_period_yr.max(), color="#9aa3ad", alpha=0.18, linewidth=0)
        ax.text(n_years / 10.0 * 1.1, 0.97, "fewer than 10\nsimulated years\nexceed: rough",
                transform=ax.get_xaxis_transform(), va="top", fontsize=7, color=_MUTED)
        from matplotlib.ticker import FuncFormatter

        ax.set_xscale("log")
        ax.set_xlim(1.0, curve.return_period_yr.max())
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:,.0f}"))
        ax.set_ylim(bottom=0)
        ax.set_xlabel("return period [yr] (1 / annual exceedance probability)")
        _money_axis(ax, "y", cur)
        ax.legend(loc="upper left")
        out.append(_figure_html(
            fig, "portfolio loss exceedance curves",
            f"Figure: portfolio loss [million {cur}] against return period [yr], log x. AEP: aggregate loss of a year; "
            f"OEP (lighter, dashed): largest single event of a year; it runs close to AEP where one event "
            f"dominates the year's loss. Dotted lines: configured return periods. Grey: return periods "
            f"beyond {n_years / 10:,.0f} yr, where fewer than 10 simulated years exceed the loss."))
    rows = []
    for basis, r in s.iterrows():
        classical = r.get("classical_eal_same_branch", float("nan"))
        rows.append([basis.replace("_", "-"), _cell(_money(r.aal), r.aal),
                     _cell(_money(r.aal_standard_error), r.aal_standard_error),
                     _cell(_pct(r.aal_standard_error / r.aal) if r.aal else "n/a",
                           r.aal_standard_error / r.aal if r.aal else float("nan")),
                     _cell(_money(classical), classical)])
    out.append("<h3>Average annual loss</h3>")
    out.append(_table(["basis", f"AAL [{cur}/yr]#", "± 1 standard error#", "relative s.e.#",
                       f"classical EAL, same branch [{cur}/yr]#"], rows))
    out.append("<h3>Probable maximum loss and TVaR</h3>")
    rows = []
    for r in ep.sort_values(["basis", "return_period_yr"], key=lambda c: c.map({"ground_up": 0, "net": 1})
                            if c.name == "basis" else c).itertuples():
        rows.append([r.basis.replace("_", "-"), _cell(f"{r.return_period_yr:,.0f}", r.return_period_yr),
                     _cell(_money(r.aep_loss), r.aep_loss), _cell(_money(r.oep_loss), r.oep_loss),
                     _cell(_money(r.tvar_loss), r.tvar_loss)])
    out.append(_table(["basis", "return period [yr]#", f"PML, aggregate (AEP) [{cur}]#",
                       f"PML, occurrence (OEP) [{cur}]#", f"TVaR, aggregate [{cur}]#"], rows))
    out.append(_p("PML: the loss exceeded with annual probability 1/T (empirical order statistic of the simulated "
                  "years). TVaR: the mean annual aggregate loss given that it exceeds the PML at T."))
    brk = run.table("portfolio_breakdown")
    if brk is not None and len(brk):
        out.append("<h3>AAL by building class and by source</h3>")
        rows = [[r.dimension.replace("_", " "), r.key, _cell(_money(r.aal_ground_up), r.aal_ground_up),
                 _cell(_money(r.aal_net), r.aal_net)]
                for r in brk.sort_values(["dimension", "aal_ground_up"], ascending=[True, False]).itertuples()]
        out.append(_table(["by", "key", f"AAL ground-up [{cur}/yr]#", f"AAL net [{cur}/yr]#"], rows, sortable=True))
    return "".join(out)


# --- 7. map ---------------------------------------------------------------------------------------------

def _exposure_positions(run):
    """asset_id, lon, lat from the run's exposure file, or (None, note)."""
    from quakefolio.pipeline.ingest import EXPOSURE_COLUMNS, read_table as read_input

    info = (run.manifest.get("inputs") or {}).get("exposure") or {}
    path = info.get("path") or run.section("exposure").get("file")
    if not path or not Path(path).is_file():
        return None, f"The exposure file {path or '(not named)'} is no longer there: asset positions unknown."
    status = _file_status(path, info.get("sha256", ""))
    if info.get("sha256") and status != "unchanged":
        return None, f"The exposure file {path} changed since the run: positions not drawn (they may not match)."
    try:
        frame, _rows = read_input(path, EXPOSURE_COLUMNS)
        pos = pd.DataFrame({"asset_id": frame["asset_id"].astype(str).str.strip(),
                            "lon": pd.to_numeric(frame["lon"], errors="coerce"),
                            "lat": pd.to_numeric(frame["lat"], errors="coerce")})
    except (InputError, KeyError) as exc:
        return None, f"The exposure file could not be read ({exc}): positions not drawn."
    return pos, None


def _nice(x):
    """A round number near ``x`` (1, 2 or 5 times a power of ten)."""
    if x <= 0:
        return x
    e = math.floor(math.log10(x))
    base = x / 10 ** e
    step = 1 if base < 1.5 else 2 if base < 3.5 else 5 if base < 7.5 else 10
    return step * 10 ** e


def _section_map(run):
    loss = run.table("asset_loss")
    if loss is None or not len(loss):
        return _note("This run holds no per-asset results (hazard stage only).")
    pos, note = _exposure_positions(run)
    if pos is None:
        return _note(note)
    d = loss.merge(pos, on="asset_id", how="left")
    missing = int(d.lon.isna().sum())
    d = d.dropna(subset=["lon", "lat"])
    if not len(d):
        return _note("No asset of the run has a position in the exposure file.")
    from matplotlib.colors import LinearSegmentedColormap

    cur = run.currency
    lat0 = float(np.deg2rad(d.lat.mean()))
    fig = _new_figure(7.4, 6.4)
    ax = fig.subplots()
    cmap = LinearSegmentedColormap.from_list("qf_loss", ["#e9e2c8", "#d9b44a", "#c97d2c", "#9b3b2f", "#3d1712"])
    # with many assets a few extreme ratios would wash out the rest: cap the colour scale at the 99th percentile
    capped = len(d) >= 100
    vmax = float(np.nanpercentile(1000 * d.eal_ratio, 99 if capped else 100)) or None
    vmax_value = float(d.replacement_value.max())
    size = 6.0 + 220.0 * np.sqrt(d.replacement_value / vmax_value)
    order = np.argsort(-d.replacement_value.to_numpy())
    sc = ax.scatter(d.lon.to_numpy()[order], d.lat.to_numpy()[order], s=size.to_numpy()[order],
                    c=1000 * d.eal_ratio.to_numpy()[order], cmap=cmap, vmin=0, vmax=vmax, edgecolors=_INK,
                    linewidths=0.35, alpha=0.9)
    cb = fig.colorbar(sc, ax=ax, shrink=0.75, pad=0.02,
                      extend="max" if vmax and (1000 * d.eal_ratio).max() > vmax else "neither")
    cb.set_label("EAL ratio [‰ of value per yr]")
    ax.set_aspect(1.0 / math.cos(lat0))
    ax.set_xlabel("longitude [°]")
    ax.set_ylabel("latitude [°]")
    ax.ticklabel_format(useOffset=False, style="plain")
    # value legend
    refs = sorted({_nice(v) for v in np.quantile(d.replacement_value, [0.5, 0.9, 1.0])})
    handles = [ax.scatter([], [], s=6.0 + 220.0 * np.sqrt(v / vmax_value), facecolor="none", edgecolors=_INK,
                          linewidths=0.6) for v in refs]
    fig.legend(handles, [f"{v:,.0f}" for v in refs], title=f"marker area: replacement value [{cur}]",
               title_fontsize=7.5, loc="outside lower center", ncol=len(refs), columnspacing=2.5, fontsize=7.5)
    # scale bar in a strip added below the assets: about a fifth of the width, km along the mean latitude
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    y0 -= 0.12 * (y1 - y0)
    ax.set_ylim(y0, y1)
    km_per_deg = 111.32 * math.cos(lat0)
    width_km = (x1 - x0) * km_per_deg
    bar_km = _nice(width_km / 5.0) if width_km > 0 else 1.0
    bar_deg = bar_km / km_per_deg
    bx, by = x0 + 0.04 * (x1 - x0), y0 + 0.05 * (y1 - y0)
    ax.plot([bx, bx + bar_deg], [by, by], color=_INK, linewidth=2.5, solid_capstyle="butt")
    ax.text(bx + bar_deg / 2, by + 0.015 * (y1 - y0), f"{bar_km:g} km", ha="center", va="bottom", fontsize=7.5)
    caption = (f"Figure: {len(d):,} assets at their exposure-file positions (WGS84 degrees); marker area grows with "
               f"replacement value [{cur}], colour gives the expected annual loss ratio [‰ of value per year, "
               f"classical]"
               f"{' (colour scale capped at the 99th percentile)' if capped else ''}. Axes are drawn with equal "
               f"ground distance per degree at latitude {d.lat.mean():.2f}° (x stretched by 1/cos(lat)); the scale "
               f"bar is {bar_km:g} km.")
    out = [_figure_html(fig, "map of assets by replacement value and EAL ratio", caption)]
    if missing:
        out.append(_note(f"{missing} asset(s) of the run have no position in the exposure file and are not drawn."))
    return "".join(out)


# --- 8. changes -----------------------------------------------------------------------------------------

_METRIC_LABELS = {"n_assets": "assets", "total_replacement_value": "total replacement value",
                  "eal": "EAL, classical", "aal": "AAL", "pml_aep": "PML aggregate (AEP)",
                  "pml_oep": "PML occurrence (OEP)", "tvar": "TVaR aggregate"}


def _setting_text(value, limit=160):
    """A config value as compact JSON, shortened for the page."""
    if value is None:
        return "not\u00a0set"
    text = json.dumps(value, sort_keys=True, default=str)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _compare(previous_run, run):
    """compare_runs(previous, this run); a partial run folder is read through a temporary link."""
    from quakefolio.pipeline.compare import compare_runs

    if not run.path.name.startswith(PARTIAL_PREFIX):
        return compare_runs(previous_run, run.path)
    with tempfile.TemporaryDirectory(prefix="quakefolio-report-") as tmp:
        link = Path(tmp) / run.run_id
        os.symlink(run.path.resolve(), link, target_is_directory=True)
        return compare_runs(previous_run, link)


def _section_changes(run, previous_run):
    if previous_run is None:
        return _note("No previous run was given, so no change report. Rebuild this report with "
                     "`quakefolio report RUN --previous EARLIER_RUN` to see what moved and why.")
    try:
        res = _compare(previous_run, run)
    except (InputError, OSError) as exc:
        return _note(f"No change report: {exc}")
    causes, port, assets = res["change_causes"], res["change_portfolio"], res["change_assets"]
    cur = run.currency
    a, b = causes["run_a"], causes["run_b"]
    out = [_p(f"Run A (previous) {a['run_id']} ({a['scenario']}) compared with run B (this run) {b['run_id']}.")]
    out += [_note(n) for n in causes.get("notes", [])]
    facts = []
    changed = causes.get("inputs_changed") or []
    facts.append(("input files changed", ", ".join(changed) if changed else "none"))
    frag = causes["fragility"]["classes_changed"]
    facts.append(("fragility changed for classes", ", ".join(frag) if frag else "none"))
    hz = causes["hazard"]
    facts.append(("hazard curves changed", f"at {len(hz['sites_changed'])} of {hz['sites_b']} sites "
                                           f"({hz['sites_changed_used_by_assets']} used by assets)"))
    settings = causes.get("settings_changed") or []
    facts.append(("settings changed", f"{len(settings)} (listed below)" if settings else "none"))
    ev = causes["event_based"]
    if ev["in_a"] or ev["in_b"]:
        facts.append(("simulation", f"seed {ev['seed_a']} → {ev['seed_b']}, years {ev['years_a']} → {ev['years_b']}"))
    out.append('<dl class="facts">' + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in facts) + "</dl>")
    if settings:
        scope = {"assets": "per-asset results", "event_based": "event-based tables", "other_tables": "other tables"}
        rows = [[st["setting"], _html(f'<span class="mono">{_esc(_setting_text(st["a"]))}</span>'),
                 _html(f'<span class="mono">{_esc(_setting_text(st["b"]))}</span>'),
                 scope.get(st["scope"], st["scope"])] for st in settings]
        out.append(_table(["setting", "A", "B", "acts on"], rows, wide=True))

    out.append("<h3>Portfolio</h3>")
    rows = []
    for r in port.itertuples():
        money = r.metric != "n_assets"
        fmt = _money if money else (lambda v: f"{v:,.0f}" if _finite(v) else "n/a")
        rows.append([_METRIC_LABELS.get(r.metric, r.metric), str(r.basis).replace("_", "-"),
                     _cell(f"{r.return_period_yr:,.0f}" if _finite(r.return_period_yr) else "", r.return_period_yr),
                     r.unit, _cell(fmt(r.value_a), r.value_a), _cell(fmt(r.value_b), r.value_b),
                     _cell(_signed_money(r.change), r.change), _cell(_pct(r.relative_change, True), r.relative_change),
                     "" if r.versus_standard_error == "n/a" else
                     f"{r.versus_standard_error} ({_money(r.combined_standard_error)})"])
    out.append(_table(["metric", "basis", "return period [yr]#", "unit", "A#", "B#", "change#", "relative#",
                       "change vs combined s.e."], rows))

    ac = causes["assets"]
    out.append("<h3>Assets by primary cause</h3>")
    rows = [[c, _cell(f"{ac['by_primary_cause'][c]:,}", ac["by_primary_cause"][c]),
             _cell(_signed_money(ac["eal_change_by_primary_cause"].get(c)), ac["eal_change_by_primary_cause"].get(c))]
            for c in ("hazard", "fragility", "exposure", "settings", "unexplained", "unchanged")
            if c in ac["by_primary_cause"]]
    out.append(_p(f"{ac['in_a']:,} assets in A, {ac['in_b']:,} in B ({ac['added']:,} added, "
                  f"{ac['removed']:,} removed); "
                  f"results changed for {ac['results_changed']:,}."))
    out.append(_table(["primary cause", "assets#", f"EAL change [{cur}/yr]#"], rows))

    moved = assets[assets.results_changed]
    out.append("<h3>Largest changes per asset</h3>")
    if not len(moved):
        out.append(_p("No asset's results changed."))
        return "".join(out)
    top = moved.assign(_abs=moved.eal_change.abs()).sort_values(["_abs", "asset_id"], ascending=[False, True])
    top = top.head(TOP_ASSETS)
    rows = []
    for r in top.itertuples():
        cls = r.building_class_b if r.building_class_b is not None else r.building_class_a
        site = r.site_id_b if r.site_id_b is not None else r.site_id_a
        rows.append([r.asset_id, r.status, cls, site, _cell(_money(r.eal_a), r.eal_a), _cell(_money(r.eal_b), r.eal_b),
                     _cell(_signed_money(r.eal_change), r.eal_change),
                     _cell(_pct(r.eal_relative_change, True), r.eal_relative_change),
                     _cell(f"{_prob(r.collapse_prob_in_horizon_a)} → {_prob(r.collapse_prob_in_horizon_b)}",
                           r.collapse_prob_in_horizon_change),
                     (r.causes or r.primary_cause).replace(",", ", ")])
    out.append(_table(["asset", "status", "class", "site", f"EAL A [{cur}/yr]#", f"EAL B [{cur}/yr]#", "change#",
                       "relative#", f"P(collapse in {run.horizon:g} yr) A → B#", "causes"], rows, sortable=True))
    out.append(_p(f"The {len(top)} assets with the largest absolute EAL change; causes in order of weight "
                  "(hazard at the asset's site, its class's fragility, its exposure record, settings acting on "
                  "per-asset results)."))
    return "".join(out)


# --- 9. cross-checks and logic tree ---------------------------------------------------------------------

def _verdict(ok):
    return _html('<span class="ok">passed</span>' if ok else '<span class="bad">not passed</span>')


def _section_checks(run):
    cur = run.currency
    out = ["<h3>Cross-checks between the event-based and the classical results</h3>"]
    checks = run.manifest.get("cross_checks")
    if not checks:
        out.append(_note("No cross-checks: this run has no event-based simulation."))
    else:
        rows = []
        p = checks.get("portfolio_aal_vs_classical_eal")
        if p:
            rows.append(["portfolio AAL vs classical EAL of the same branch",
                         f"event-based {_money(p['event_based_aal'], cur + '/yr')} vs classical "
                         f"{_money(p['classical_eal'], cur + '/yr')}; z = {p['z']:+.2f} "
                         f"(1 s.e. {_money(p['standard_error'])})", "|z| ≤ 3", _verdict(p.get("passed"))])
        a = checks.get("asset_aal_vs_classical_eal")
        if a:
            share = a["share_within_3_standard_errors"]
            rows.append(["assets within 3 standard errors of their classical EAL",
                         f"{a['within_3_standard_errors']:,} of {a['assets']:,} ({_pct(share)}); max |z| "
                         f"{a['max_abs_z']:.2f}", "99.7% if the errors were independent", "for review"])
        h = checks.get("event_hazard_vs_classical")
        if h:
            share = h["share_within_3_standard_errors"]
            rows.append(["event-based hazard vs classical curves",
                         f"{h['within_3_standard_errors']:,} of {h['compared_points']:,} exceedance rates above "
                         f"{h['rate_threshold_per_yr']:.1e}/yr within 3 s.e. ({_pct(share)}); max |z| "
                         f"{h['max_abs_z']:.2f}", "99.7% if the errors were independent", "for review"])
        out.append(_table(["check", "result", "expectation", "verdict"], rows))
        if checks.get("note"):
            out.append(_p(f"Note: {checks['note']}."))
        out.append(_p("z = (event-based - classical) / standard error of the event-based estimate. The portfolio "
                      "check passes when |z| <= 3. The per-asset and per-hazard-point comparisons share the same "
                      "simulated events, so their errors are correlated: when the portfolio z is large, many assets "
                      "move together and fewer than 99.7% can lie within 3 standard errors without any defect. "
                      "They carry no pass mark here: read them together with the portfolio z."))
    out.append("<h3>Hazard logic tree</h3>")
    tree = run.manifest.get("hazard_logic_tree")
    hz = run.section("hazard")
    if not tree:
        src = ((run.manifest.get("inputs") or {}).get("hazard_curves") or {}).get("path") or hz.get("curves_file")
        out.append(_note(f"Hazard was tabulated from a file ({src}); the run holds no logic tree of its own."))
        return "".join(out)
    rows = []
    for br in tree.get("source_branches", []):
        for k, s in enumerate(br.get("sources", [])):
            rows.append([br["id"] if k == 0 else "", _cell(f"{br['weight']:.3g}", br["weight"]) if k == 0 else "",
                         _cell(f"{br['ruptures']:,}", br["ruptures"]) if k == 0 else "", s.get("source_id", ""),
                         s.get("kind", ""), _cell(f"{s.get('n_ruptures', 0):,}", s.get("n_ruptures")),
                         _cell(_g(s.get("total_rate"), 4), s.get("total_rate"))])
    out.append(_table(["source-model branch", "weight#", "ruptures#", "source", "kind", "ruptures#",
                       "total rate [1/yr]#"], rows))
    rows = [[g["id"], _cell(f"{g['weight']:.3g}", g["weight"])] for g in tree.get("gmm_branches", [])]
    out.append(_table(["ground-motion branch", "weight#"], rows))
    trunc = hz.get("truncation_sigma")
    facts = [("IMs computed", ", ".join(tree.get("ims", []))),
             ("branches", f"{len(tree.get('source_branches', []))} source model x "
                          f"{len(tree.get('gmm_branches', []))} ground-motion = "
                          f"{len(tree.get('source_branches', [])) * len(tree.get('gmm_branches', []))} end branches"),
             ("ground-motion truncation", f"{trunc:g} sigma" if _finite(trunc) else "none"),
             ("integration distance", f"{hz.get('integration_distance_km', float('nan')):g} km"),
             ("fractiles", ", ".join(f"{f:g}" for f in hz.get("fractiles") or []) or "none"),
             ("curves used for damage", "weighted mean over the end branches"
              + ("; every end branch is also carried through the damage and loss (fractile tables)"
                 if hz.get("propagate_branches") else ""))]
    out.append('<dl class="facts">' + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in facts) + "</dl>")
    return "".join(out)


# --- the document ---------------------------------------------------------------------------------------

def _safe(builder, *args):
    """A section body; a failure becomes a note in that section instead of breaking the report."""
    try:
        return builder(*args)
    except Exception as exc:  # noqa: BLE001 - one broken section must not lose the rest of the report
        return _note(f"This section could not be drawn: {type(exc).__name__}: {exc}")


def build_report(run_dir, *, previous_run=None):
    """The HTML report of one run, as a string (one self-contained document).

    Parameters
    ----------
    run_dir : path-like
        The run folder holding ``manifest.json`` and the Parquet tables; a finished run
        or a partial folder being written (only this folder is read).
    previous_run : path-like, optional
        A finished run (or an output folder, for its ``LATEST`` run) to compare with;
        adds the change report (:func:`quakefolio.pipeline.compare.compare_runs`).

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
    import matplotlib

    run = _Run(run_dir)
    builders = {
        "inputs": (_section_inputs, run), "hazard": (_section_hazard, run), "fragility": (_section_fragility, run),
        "damage": (_section_damage, run), "riskiest": (_section_riskiest, run),
        "portfolio": (_section_portfolio, run), "screening": (_section_screening, run),
        "whatif": (_section_whatif, run), "map": (_section_map, run),
        "changes": (_section_changes, run, previous_run), "checks": (_section_checks, run),
    }
    with matplotlib.rc_context(_RC):
        bodies = {sid: _safe(fn, *args) for sid, (fn, *args) in builders.items()}
        keys = _safe(_key_figures, run)
    scenario = run.manifest.get("scenario") or run.section("scenario").get("name", "")
    nav = "<nav><ol>" + "".join(f'<li><a href="#{sid}">{_esc(title)}</a></li>'
                                for sid, title in SECTIONS) + "</ol></nav>"
    sections = "".join(f'<section id="{sid}"><h2>{_esc(title)}</h2>{bodies[sid]}</section>' for sid, title in SECTIONS)
    version = (run.manifest.get("packages") or {}).get("quakefolio") or ""
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
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


def write_report(run_dir, out_path, *, previous_run=None):
    """Build the report of ``run_dir`` and write it to ``out_path`` atomically; return the path.

    The document is written to a temporary file in the target folder, flushed to disk,
    then renamed over ``out_path`` (``os.replace``): readers see the old file or the
    new one, never a half-written one.  The folder must exist.
    """
    text = build_report(run_dir, previous_run=previous_run)
    out = Path(out_path)
    folder = out.parent if str(out.parent) else Path(".")
    if not folder.is_dir():
        raise InputError(folder, "folder does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        os.replace(tmp, out)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return out
