"""Render the pack's document as one self-contained HTML file.

Figures are embedded as base64 PNG, the style sheet is inline, there is no script and no
external resource, so the file opens offline and prints (print CSS: A4, one section per page,
figures and table rows never split).
"""
from __future__ import annotations

import base64
import html
import json

from . import _style as S
from ._model import Cell, Figure, Para, Table

__all__ = ["render_html"]

CSS = """
:root { --ink: %(ink)s; --muted: %(muted)s; --accent: %(accent)s; --paper: %(paper)s;
        --rule: #d9dde2; --pass: %(pass)s; --fail: %(fail)s; --open: %(open)s; }
* { box-sizing: border-box; }
html { background: #eceae4; }
body { margin: 0; color: var(--ink); font: 15px/1.5 "DejaVu Sans", "Segoe UI", Helvetica, Arial, sans-serif; }
.sheet { max-width: 920px; margin: 24px auto; background: var(--paper); padding: 36px 52px 56px;
         border: 1px solid #d6d3cb; }
header.masthead { border-bottom: 3px double var(--accent); padding-bottom: 14px; margin-bottom: 18px; }
.kicker { text-transform: uppercase; letter-spacing: .14em; font-size: 11.5px; color: var(--accent); font-weight: bold; }
h1 { font-family: "DejaVu Serif", Georgia, "Times New Roman", serif; font-size: 30px; line-height: 1.2; margin: 6px 0 4px; }
.meta { color: var(--muted); font-size: 13px; }
nav.toc { border: 1px solid var(--rule); background: #fff; padding: 10px 18px; margin: 0 0 26px; }
nav.toc h2 { font-size: 13px; text-transform: uppercase; letter-spacing: .1em; margin: 4px 0 6px; color: var(--accent); border: 0; padding: 0; }
nav.toc ol { margin: 0; padding-left: 22px; columns: 2; column-gap: 30px; font-size: 14px; }
nav.toc a { color: var(--ink); text-decoration: none; }
nav.toc a:hover { text-decoration: underline; }
.toc-flag { color: var(--muted); font-size: 12px; }
section { margin: 0 0 34px; }
h2 { font-family: "DejaVu Serif", Georgia, serif; font-size: 22px; margin: 0 0 12px; padding-bottom: 5px;
     border-bottom: 1px solid var(--accent); }
h2 .num { color: var(--accent); margin-right: .45em; }
p { margin: 8px 0; }
p.lead { font-weight: bold; font-size: 16px; margin-top: 2px; }
p.answer-pass, p.answer-fail, p.answer-open { font-size: 16px; padding: 12px 16px; margin: 8px 0 16px;
     background: #fff; border-left: 6px solid var(--open); }
p.answer-pass { border-left-color: var(--pass); }
p.answer-fail { border-left-color: var(--fail); }
p.hypothetical { font-size: 12.5px; color: var(--muted); font-style: italic; border-top: 1px dotted var(--rule);
     border-bottom: 1px dotted var(--rule); padding: 4px 0; }
p.absent { background: #fff; border: 1px dashed var(--open); padding: 10px 14px; }
p.note { font-size: 12.5px; color: var(--muted); }
p.caution { border: 1px solid var(--ink); padding: 10px 14px; background: #fff; font-weight: bold; }
pre.code { font: 12.5px/1.45 "DejaVu Sans Mono", Consolas, monospace; background: #fff; border: 1px solid var(--rule);
     padding: 10px 14px; white-space: pre-wrap; word-break: break-word; }
figure { margin: 14px 0 20px; break-inside: avoid; page-break-inside: avoid; }
figure img { display: block; width: 100%%; height: auto; border: 1px solid var(--rule); background: #fff; }
figcaption { font-size: 13px; color: var(--muted); margin-top: 5px; }
figcaption .fig-no, .tab-cap .tab-no { color: var(--ink); font-weight: bold; }
.tab-wrap { margin: 12px 0 20px; overflow-x: auto; }
.tab-cap { font-size: 13px; color: var(--muted); margin-bottom: 4px; }
table { border-collapse: collapse; width: 100%%; font-size: 12.5px; background: #fff; margin-bottom: 6px; }
th { text-align: left; font-weight: bold; border-bottom: 1.5px solid var(--ink); padding: 5px 7px; vertical-align: bottom; }
td { border-bottom: 1px solid var(--rule); padding: 4px 7px; vertical-align: top; }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; }
td.n { white-space: nowrap; }
td.label { white-space: nowrap; }
td.kv-label { width: 34%%; color: var(--muted); }
td.wrap { word-break: break-all; }
tr { break-inside: avoid; page-break-inside: avoid; }
.tab-note { font-size: 12px; color: var(--muted); margin-top: 5px; }
.badge { display: inline-block; font-weight: bold; font-size: 11.5px; letter-spacing: .06em; padding: 1px 7px;
         border-radius: 3px; color: #fff; white-space: nowrap; }
.badge.pass { background: var(--pass); }
.badge.fail { background: var(--fail); }
.badge.na { background: #fff; color: var(--open); border: 1px solid var(--open); }
.badge.pass::before { content: "\\2713\\00a0"; }
.badge.fail::before { content: "\\2717\\00a0"; }
.badge.na::before { content: "\\2013\\00a0"; }
footer.foot { margin-top: 30px; border-top: 1px solid var(--rule); padding-top: 8px; font-size: 12px; color: var(--muted); }
@page { size: A4; margin: 16mm 14mm 18mm; }
@media print {
  html, body { background: #fff; }
  .sheet { margin: 0; border: 0; padding: 0; max-width: none; background: #fff; }
  section { break-before: page; page-break-before: always; }
  section#s1, section.absent { break-before: auto; page-break-before: auto; }
  nav.toc { break-after: page; page-break-after: always; }
  nav.toc a::after { content: ""; }
  a { color: inherit; text-decoration: none; }
  .tab-wrap { overflow: visible; }
  thead { display: table-header-group; }
  body { font-size: 11pt; }
  table { font-size: 9pt; }
}
""" % {"ink": S.INK, "muted": S.MUTED, "accent": S.ACCENT, "paper": S.PAPER, "pass": S.PASS,
       "fail": S.FAIL, "open": S.OPEN}


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _cell(c: Cell, tag: str = "td", *, klass: str = "") -> str:
    classes = [klass] if klass else []
    attrs = ""
    if c.numeric:
        if "n" not in classes and not klass.startswith("kv"):
            classes.append("n")
        if c.src:
            attrs += f' data-src="{_e(json.dumps([list(p) for p in c.src]))}"'
            attrs += f' data-op="{_e(c.op)}" data-fmt="{_e(c.fmt)}"'
        if c.value is not None:
            attrs += f' data-value="{c.value!r}"'
    body = _e(c.text)
    if c.status:
        body = f'<span class="badge {c.status}">{body}</span>'
        attrs += f' data-status="{_e(c.status)}"'
    if len(c.text) > 40 and " " not in c.text:
        classes.append("wrap")
    cls = f' class="{" ".join(classes)}"' if classes else ""
    return f"<{tag}{cls}{attrs}>{body}</{tag}>"


def _table(t: Table, number: int) -> str:
    is_kv = t.columns == ("Item", "Value")
    chunks = t.column_chunks(10)
    numeric = [False] * len(t.columns) if is_kv else t.numeric_columns()
    out = [f'<div class="tab-wrap" id="{_e(t.key)}">']
    for part, cols in enumerate(chunks):
        label = "" if len(chunks) == 1 else f" (part {part + 1} of {len(chunks)})"
        out.append(f'<div class="tab-cap"><span class="tab-no">Table {number}{label}.</span> '
                   f'{_e(t.caption)}</div>')
        out.append(f'<table data-table="{_e(t.key)}">')
        if not is_kv:
            out.append("<thead><tr>" + "".join(
                f'<th class="{"n" if numeric[i] else ("label" if j == 0 and t.first_column_is_label else "")}">'
                f'{_e(t.columns[i])}</th>' for j, i in enumerate(cols)) + "</tr></thead>")
        out.append("<tbody>")
        for row in t.rows:
            cells = []
            for j, i in enumerate(cols):
                c = row[i]
                if is_kv:
                    klass = "kv-label" if j == 0 else "kv-value"
                elif numeric[i]:
                    klass = "n"
                else:
                    klass = "label" if j == 0 and t.first_column_is_label else ""
                cells.append(_cell(c, klass=klass))
            out.append("<tr>" + "".join(cells) + "</tr>")
        out.append("</tbody></table>")
    if t.note:
        out.append(f'<div class="tab-note">{_e(t.note)}</div>')
    out.append("</div>")
    return "\n".join(out)


def _figure(f: Figure, number: int) -> str:
    b64 = base64.b64encode(f.png).decode("ascii")
    return (f'<figure id="{_e(f.key)}"><img alt="{_e(f.alt)}" src="data:image/png;base64,{b64}">'
            f'<figcaption><span class="fig-no">Figure {number}.</span> {_e(f.caption)} '
            f'(numbers: data/{_e(f.key)}.csv)</figcaption></figure>')


def render_html(title: str, created: str, sections, *, generated: str) -> str:
    """The whole pack as one HTML string."""
    fig_no = tab_no = 0
    body = []
    for s in sections:
        absent = ' class="absent"' if s.absent else ""
        parts = [f'<section id="s{s.number}"{absent} data-section="{_e(s.key)}">',
                 f'<h2><span class="num">{s.number}</span>{_e(s.title)}</h2>']
        for b in s.blocks:
            if isinstance(b, Para):
                if b.style == "code":
                    parts.append(f'<pre class="code">{_e(b.text)}</pre>')
                else:
                    parts.append(f'<p class="{_e(b.style)}">{_e(b.text)}</p>')
            elif isinstance(b, Table):
                tab_no += 1
                parts.append(_table(b, tab_no))
            elif isinstance(b, Figure):
                fig_no += 1
                parts.append(_figure(b, fig_no))
        parts.append("</section>")
        body.append("\n".join(parts))
    toc = "".join(
        f'<li><a href="#s{s.number}">{_e(s.title)}</a>'
        + (' <span class="toc-flag">(not available)</span>' if s.absent else "") + "</li>"
        for s in sections)
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_e(title)}: evidence pack</title>
<style>{CSS}</style>
</head>
<body>
<div class="sheet">
<header class="masthead">
<div class="kicker">noiseproof evidence pack</div>
<h1>{_e(title)}</h1>
<div class="meta">Run created {_e(created or 'n/a')} &middot; pack built {_e(generated)} &middot;
hypothetical simulated and backtested results &middot; decision support, not investment advice</div>
</header>
<nav class="toc"><h2>Contents</h2><ol>{toc}</ol></nav>
{chr(10).join(body)}
<footer class="foot">{_e(title)} &middot; {_e(created or '')} &middot; built from summary.json,
manifest.json and tables/ of the run folder; the numbers behind every figure and table are in data/.</footer>
</div>
</body>
</html>
"""
