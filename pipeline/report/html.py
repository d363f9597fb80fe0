"""HTML building blocks of the report: style sheet, sorting script, number formats, tables, notes."""
from __future__ import annotations

import html
import math

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
details.explain{background:#fff;border:1px solid var(--rule);border-left:3px solid var(--teal);padding:6px 12px;
margin:0 0 16px}
details.explain summary{cursor:pointer;font-weight:600}
details.explain ul{margin:6px 0 2px;padding-left:18px}
details.explain li{margin:4px 0;max-width:110ch}
footer{color:var(--muted);font-size:12px;padding:16px 0}
.toggle{display:flex;flex-wrap:wrap;gap:4px 16px;align-items:center;margin:8px 0;font-size:13px}
.toggle label{cursor:pointer}
.views>[hidden]{display:none}
table.fit{max-width:100%}
table.fit th,table.fit td,table.fit td.n,table.fit th.n{white-space:normal}
@media print{.views>[hidden]{display:block}nav{display:none}.scroll{max-height:none;overflow:visible}figure,table{break-inside:avoid}}
"""

# Sort a table by the clicked header: numbers by their data-v attribute, text otherwise; a radio button of a
# .toggle shows the child of the .views block (data-toggle = its name) whose data-view is its value.
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
document.querySelectorAll('.toggle input[type=radio]').forEach(function(r){
r.addEventListener('change',function(){var v=document.querySelector('.views[data-toggle="'+r.name+'"]');
if(!v)return;Array.prototype.forEach.call(v.children,function(c){c.hidden=c.getAttribute('data-view')!==r.value;});});
});
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


def _table(headers, rows, *, sortable=False, scroll=False, caption=None, groups=None, wide=False, fit=False):
    """HTML table. ``headers``: labels (a label ending in ``#`` is a numeric column,
    shown without the mark). ``rows``: lists of cells, each a plain value (escaped),
    :func:`_cell` output (right-aligned, sorted numerically) or :func:`_html` output.
    ``groups``: optional ``[(label, n_columns), ...]`` header row above the labels.
    ``fit``: headers and cells wrap, so a table of many columns stays within the page's width."""
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
    classes = " ".join(c for c, on in (("sortable", sortable), ("wide", wide), ("fit", fit)) if on)
    cls = f' class="{classes}"' if classes else ""
    cap = f"<caption>{_esc(caption)}</caption>" if caption else ""
    out = f"<table{cls}>{cap}<thead>{top}<tr>{''.join(hs)}</tr></thead><tbody>{''.join(body)}</tbody></table>"
    return f'<div class="scroll">{out}</div>' if scroll else out


def _html(fragment):
    """A table cell holding trusted HTML (already escaped by the caller)."""
    return ("html", fragment)


def _toggle(name, label, views, default):
    """Radio buttons showing one of several views (e.g. one figure per colouring); the others are hidden.

    ``views``: ``[(value, radio label, html), ...]``; ``default``: the value shown first.
    Without the script every view after the default stays hidden; printing shows them all."""
    radios = "".join(f'<label><input type="radio" name="{_esc(name)}" value="{_esc(v)}"'
                     f'{" checked" if v == default else ""}> {_esc(text)}</label>' for v, text, _ in views)
    blocks = "".join(f'<div data-view="{_esc(v)}"{"" if v == default else " hidden"}>{body}</div>'
                     for v, _, body in views)
    return (f'<div class="toggle" role="radiogroup" aria-label="{_esc(label)}"><span>{_esc(label)}:</span>'
            f'{radios}</div><div class="views" data-toggle="{_esc(name)}">{blocks}</div>')


def _note(text):
    return f'<p class="note">{_esc(text)}</p>'


def _p(text):
    return f"<p>{_esc(text)}</p>"


def _facts(pairs):
    """A definition list of ``(label, value)`` pairs (both escaped)."""
    return '<dl class="facts">' + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in pairs) + "</dl>"
