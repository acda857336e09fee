"""HTML pieces of the report: escaping, plain text of manifest values, tables, figures, CSS.

Every string that comes from a file goes through :func:`esc`; table cells are HTML already
(callers escape). Shared by the section builders (glance, tables, plots) and the page in
rig.report.page; the page's stylesheet and its colours are here too.
"""

from __future__ import annotations

import base64
import html
import re
from collections.abc import Iterable, Sequence
from typing import Any

from rig.report import figures as F
from rigbase.units import eng


def esc(value: object) -> str:
    """HTML-escaped text of any value (quotes too, so it is safe in attributes)."""
    return html.escape("" if value is None else str(value), quote=True)


def _plain(value: object) -> str:
    """A manifest value as short plain text (not escaped)."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, list | tuple):
        return ", ".join(_plain(v) for v in value)
    if isinstance(value, dict):
        return ", ".join(f"{k}={_plain(v)}" for k, v in value.items())
    return "" if value is None else str(value)


def _slug(s: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", s.lower()).strip("-") or "x"


def _table(header: Sequence[str], rows: Iterable[Sequence[str]], cls: str = "") -> str:
    """A table; cells are HTML already (callers escape text from files). Columns that are
    empty in every row are left out."""
    rows = [list(r) for r in rows]
    keep = [i for i in range(len(header)) if not rows or any(r[i] not in ("", "–") for r in rows)]
    head = "".join(f"<th>{header[i]}</th>" for i in keep)
    body = "".join("<tr>" + "".join(f"<td>{r[i]}</td>" for i in keep) + "</tr>" for r in rows)
    c = f' class="{cls}"' if cls else ""
    return f"<table{c}><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _verdict_cell(v: str) -> str:
    k = v.lower()
    cls = (
        "pass"
        if k in ("pass", "passed", "ok", "equivalent")
        else ("fail" if k in ("fail", "failed", "not equivalent", "different") else "other")
    )
    return f'<span class="v {cls}">{esc(v) or "–"}</span>'


def _dict(v: object) -> dict[str, Any]:
    return v if isinstance(v, dict) else {}


def _short(value: object, limit: int = 160) -> str:
    """A manifest value as one short line: nested tables beyond one level are elided."""
    if isinstance(value, dict):
        text = ", ".join(
            f"{k}={'…' if isinstance(v, dict | list) and v else _plain(v) or '–'}"
            for k, v in value.items()
        )
    elif isinstance(value, list) and any(isinstance(v, dict) for v in value):
        text = "; ".join(_short(v, limit) for v in value)
    else:
        text = _plain(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _kv(items: Iterable[tuple[str, object]]) -> str:
    rows = [(k, _short(v)) for k, v in items if v not in (None, "", [], {})]
    return (
        "<dl class='kv'>"
        + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in rows)
        + "</dl>"
    )


def _img(fig: F.RenderedFigure, alt: str, caption: str) -> str:
    data = base64.b64encode(fig.png).decode("ascii")
    return (
        f"<figure><img alt='{esc(alt)}' src='data:image/png;base64,{data}'>"
        f"<figcaption>{caption} <span class='n'>(files: figures/{esc(fig.png_path.name)}, "
        f"figures/{esc(fig.svg_path.name)})</span></figcaption></figure>"
    )


# The page's own colours, all named in :root. Every text colour keeps at least the 4.5:1
# contrast of WCAG 2.1, 1.4.3 Contrast (Minimum), on each background it is used on
# (tests/unit/test_report.py computes them).
_CSS = """
:root{--ink:#1c2329;--mute:#575e66;--rule:#d3d8dc;--pass:#17694a;--fail:#a5400f;--bg:#f5f6f3;
--paper:#ffffff;--head:#eaeef0;--pass-bg:#e1f1e8;--other-bg:#e9ebeb;--caution-bg:#fcf1e9}
body{font:15px/1.45 "DejaVu Sans",system-ui,sans-serif;color:var(--ink);margin:0;
background:var(--paper)}
main{max-width:1120px;margin:0 auto;padding:16px 24px 48px}
h1{font-size:1.6em;margin:.4em 0 .1em}h2{font-size:1.25em;margin:1.6em 0 .4em;
border-bottom:2px solid var(--ink);padding-bottom:3px}h3{font-size:1.05em;margin:1.1em 0 .3em}
table{border-collapse:collapse;margin:.5em 0 1em;font-size:.88em}
th,td{border-bottom:1px solid var(--rule);padding:4px 8px;text-align:left;vertical-align:top}
th{background:var(--head);font-weight:600}
.wide{overflow-x:auto}table.flagged td,.nw{white-space:nowrap}table.groups{font-size:.8em}
table.glance{width:100%}table.glance td{overflow-wrap:anywhere}.n{color:var(--mute);font-size:.9em}
.v{font-weight:700;padding:1px 6px;border-radius:3px;white-space:nowrap}
.v.pass{color:var(--pass);background:var(--pass-bg)}
.v.fail{color:var(--paper);background:var(--fail)}
.v.other{color:var(--mute);background:var(--other-bg)}.warn{color:var(--fail);font-size:.88em}
.caution{border-left:6px solid var(--fail);background:var(--caution-bg);padding:4px 14px}
dl.kv{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;margin:.4em 0}
dl.kv dt{font-weight:600}dl.kv dd{margin:0}
figure{margin:.6em 0 1.4em}figure img{max-width:100%;height:auto;border:1px solid var(--rule)}
figcaption{font-size:.88em;color:var(--mute)}.lead{font-size:1.05em}
nav{font-size:.9em;color:var(--mute)}nav a{color:inherit}
svg.spark{display:block;background:var(--bg)}
.buyer{border-left:6px solid var(--pass);background:var(--pass-bg);padding:4px 14px}
@page{size:A4;margin:14mm 12mm}
@media print{
body{font-size:10.5pt;background:var(--paper)}main{max-width:none;padding:0}nav{display:none}
h2{break-after:avoid;page-break-after:avoid}h3{break-after:avoid}
figure,tr,.caution,.buyer,dl.kv{break-inside:avoid;page-break-inside:avoid}
thead{display:table-header-group}
.wide{overflow:visible}table{font-size:8pt}table.groups{font-size:6.8pt}
th,td{padding:2px 4px}figure img{max-width:100%;border:0}
section#glance,section#verdicts{break-before:page}
a{color:inherit;text-decoration:none}
.v.fail{-webkit-print-color-adjust:exact;print-color-adjust:exact}
.v.pass,.caution,.buyer{-webkit-print-color-adjust:exact;print-color-adjust:exact}
}
"""


#: headers of the group-key columns, in the order of :func:`group_cells`
GROUP_HEADERS = ("Meter", "Mode", "Capture", "Voltage", "Load", "Delay")


def group_cells(r: Any, capture: bool = True) -> list[str]:
    """Escaped cells of a group's keys: meter, mode, capture (blank when the run has only
    one), voltage, load and delay - the same columns in every table of the report."""
    return [
        esc(r.meter),
        esc(r.mode),
        esc(r.capture) if capture else "",
        esc(eng(r.volts, "V")),
        esc(r.load),
        esc(eng(r.delay_s, "s")),
    ]
