"""The page frame shared by the reports: one self-contained HTML file.

Everything is inline (style sheet, SVG plots, one tiny script), nothing is fetched, so a
report can be mailed, archived next to the board or opened on a bench PC with no network.
Verdicts and decisions are shown as a word and a symbol as well as a colour, so they read
the same for colour-blind readers and on a black-and-white printout.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from html import escape

from harness.outcomes import CSS_COLOURS, UNKNOWN, look

CSS = """
:root { __TONES__ --ink:#1d1d1d; --rule:#c9c9c9; }
* { box-sizing: border-box; }
body { font-family: sans-serif; color: var(--ink); margin: 1.2rem auto; max-width: 1150px;
       padding: 0 1rem; line-height: 1.35; font-size: 14px; }
h1 { font-size: 1.5rem; margin: 0 0 .3rem 0; }
h2 { font-size: 1.2rem; border-bottom: 2px solid var(--ink); padding-bottom: .15rem;
     margin-top: 1.6rem; }
h3 { font-size: 1.02rem; margin: 1rem 0 .4rem 0; }
table { border-collapse: collapse; margin: .4rem 0 .8rem 0; }
th, td { border: 1px solid var(--rule); padding: .18rem .45rem; text-align: left;
         vertical-align: top; }
th { background: #efefef; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { width: 13rem; }
.mono { font-family: monospace; word-break: break-all; }
.badge { display: inline-block; padding: .05rem .45rem; border-radius: .25rem;
         font-weight: bold; border: 2px solid currentColor; white-space: nowrap; }
.badge.tone-good { color: var(--good); background: #e5f4ec; }
.badge.tone-bad { color: var(--bad); background: #fbe9df; }
.badge.tone-doubt { color: var(--doubt); background: #fdf3d7; border-style: dashed; }
.badge.tone-neutral { color: var(--neutral); background: #f1f1f1; }
.badge.tone-unseen { color: var(--unseen); background: #f6e9f6; border-style: dotted; }
.verdict { font-size: 1.6rem; padding: .2rem .8rem; }
.plots { display: flex; flex-wrap: wrap; gap: .8rem; }
.plots figure { margin: 0; }
svg.plot { max-width: 100%; height: auto; border: 1px solid #ddd; background: #fff; }
.note { background: #f6f6f6; border-left: 4px solid #888; padding: .4rem .6rem;
        margin: .4rem 0; }
.flag { font-weight: bold; color: var(--bad); }
.muted { color: #555; }
footer { margin-top: 2rem; color: #555; font-size: .85rem; border-top: 1px solid var(--rule);
         padding-top: .4rem; }
@media print {
  body { max-width: none; margin: 0; font-size: 10pt; }
  figure, tr, .badge { break-inside: avoid; }
  h2, h3 { break-after: avoid; }
  svg.plot { border: none; }
  .noprint { display: none; }
  a { color: inherit; text-decoration: none; }
}
""".replace("__TONES__", " ".join(f"--{tone}:{colour};" for tone, colour in CSS_COLOURS.items()))

#: Marks the page as loaded and counts its plots, so a headless browser's DOM dump shows
#: that the page rendered and its script ran without error.
SCRIPT = (
    "document.addEventListener('DOMContentLoaded',function(){"
    "var b=document.body;b.dataset.svgCount=String(document.querySelectorAll('svg').length);"
    "b.dataset.loaded='yes';});"
)


def e(value: object) -> str:
    """Escaped text of a value; None shows as an em dash."""
    if value is None:
        return "—"
    return escape(str(value))


def num(value: float | None, digits: int = 4) -> str:
    """A number to ``digits`` significant figures, plain text; None/NaN as an em dash."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    if isinstance(value, float) and math.isinf(value):
        return "∞" if value > 0 else "−∞"
    v = float(value)
    if v != 0 and (abs(v) >= 1e6 or abs(v) < 1e-4):
        return f"{v:.{digits - 1}e}"
    return f"{v:.{digits}g}"


def badge(decision: str | None, *, big: bool = False) -> str:
    """A decision or verdict as symbol + word in a coloured frame."""
    if decision is None:
        return f'<span class="badge {UNKNOWN.css_class}">— no verdict</span>'
    shown = look(decision)
    extra = " verdict" if big else ""
    return f'<span class="badge {shown.css_class}{extra}">{shown.symbol} {escape(decision)}</span>'


def table(
    headers: Sequence[str],
    rows: Iterable[Sequence[str]],
    *,
    numeric: Sequence[int] = (),
    cls: str = "",
) -> str:
    """An HTML table; cells are already-escaped HTML, ``numeric`` columns align right."""
    head = "".join(f"<th>{escape(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = "".join(
            f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
            for i, c in enumerate(row)
        )
        body.append(f"<tr>{cells}</tr>")
    cls_attr = f' class="{cls}"' if cls else ""
    return f"<table{cls_attr}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def kv_table(pairs: Iterable[tuple[str, str]]) -> str:
    """Two-column key/value table; values are already-escaped HTML."""
    rows = "".join(f"<tr><th>{escape(k)}</th><td>{v}</td></tr>" for k, v in pairs)
    return f'<table class="kv"><tbody>{rows}</tbody></table>'


def page(title: str, body: str, *, footer: str) -> str:
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{escape(title)}</title><style>{CSS}</style>"
        f"<script>{SCRIPT}</script></head>"
        f"<body>{body}<footer>{footer}</footer></body></html>\n"
    )
