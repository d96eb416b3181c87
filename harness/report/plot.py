"""A small plot description and its SVG renderer, so reports need no plotting library.

A :class:`Plot` is plain data (series, shaded bands, reference rules, histogram bars); the
HTML report renders it with :func:`render_svg`, and :mod:`harness.report.png` can hand the
same data to matplotlib when it is installed.  The SVG is self-contained: no fonts, scripts
or style sheets from outside, colours from a palette that stays distinct for the common
forms of colour blindness (Okabe & Ito's eight colours), and every series also differs by
marker shape or dash pattern so it survives black-and-white printing.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from html import escape

#: Okabe-Ito colour-blind-safe palette (blue, vermillion, bluish green, orange, sky blue,
#: reddish purple, yellow, black): common practice for figures meant for everyone.
PALETTE: tuple[str, ...] = (
    "#0072B2",
    "#D55E00",
    "#009E73",
    "#E69F00",
    "#56B4E9",
    "#CC79A7",
    "#F0E442",
    "#000000",
)
#: Marker shapes cycled with the colours.
MARKERS: tuple[str, ...] = ("circle", "square", "triangle", "diamond")
#: Dash patterns cycled with the colours (SVG stroke-dasharray).
DASHES: tuple[str, ...] = ("", "6 3", "2 3", "8 3 2 3")


@dataclass(frozen=True)
class Series:
    """One data set drawn as a polyline, markers, or both."""

    x: tuple[float, ...]
    y: tuple[float, ...]
    label: str
    line: bool = True
    markers: bool = True
    style: int | None = None  # index into PALETTE/MARKERS/DASHES; None = order in the plot


@dataclass(frozen=True)
class Band:
    """A shaded horizontal (axis "y") or vertical (axis "x") stripe, e.g. a limit window.

    ``low``/``high`` of None run to the edge of the plot (a one-sided limit)."""

    low: float | None
    high: float | None
    label: str
    axis: str = "y"
    colour: str = "#009E73"
    opacity: float = 0.12


@dataclass(frozen=True)
class Rule:
    """A straight reference line across the plot at ``value`` on ``axis``."""

    value: float
    label: str
    axis: str = "y"
    colour: str = "#000000"
    dash: str = "5 3"


@dataclass(frozen=True)
class Bars:
    """Histogram bars: ``edges`` has one more element than ``counts``."""

    edges: tuple[float, ...]
    counts: tuple[int, ...]
    label: str
    colour: str = "#56B4E9"


@dataclass(frozen=True)
class Plot:
    title: str
    x_label: str
    y_label: str
    series: tuple[Series, ...] = ()
    bands: tuple[Band, ...] = ()
    rules: tuple[Rule, ...] = ()
    bars: Bars | None = None
    x_log: bool = False
    y_log: bool = False
    note: str | None = None  # shown in place of the plot area when there is nothing to draw
    x_range: tuple[float, float] | None = None
    y_range: tuple[float, float] | None = None
    meta: dict[str, str] = field(default_factory=dict)

    @property
    def empty(self) -> bool:
        has_series = any(len(s.x) for s in self.series)
        return not has_series and (self.bars is None or not any(self.bars.counts))


# --- ticks --------------------------------------------------------------------------------------


def nice_step(span: float, target: int = 6) -> float:
    """Step of 1, 2 or 5 x 10^k giving about ``target`` intervals over ``span``."""
    if not math.isfinite(span) or span <= 0:
        return 1.0
    raw = span / max(target, 1)
    mag = 10 ** math.floor(math.log10(raw))
    for m in (1.0, 2.0, 5.0, 10.0):
        if raw <= m * mag * (1 + 1e-9):
            return m * mag
    return 10 * mag  # pragma: no cover - the loop always returns


def linear_ticks(lo: float, hi: float, target: int = 6) -> list[float]:
    step = nice_step(hi - lo, target)
    first = math.ceil(lo / step - 1e-9) * step
    ticks = []
    v = first
    while v <= hi + step * 1e-9:
        ticks.append(0.0 if abs(v) < step * 1e-9 else v)
        v += step
    return ticks


def log_ticks(lo: float, hi: float) -> list[float]:
    """Decades, with 2 and 5 in between when the range spans few decades."""
    d0, d1 = math.floor(math.log10(lo) + 1e-9), math.ceil(math.log10(hi) - 1e-9)
    mult = (1.0, 2.0, 5.0) if d1 - d0 <= 3 else (1.0,)
    ticks = [m * 10.0**d for d in range(d0, d1 + 1) for m in mult]
    inside = [t for t in ticks if lo * (1 - 1e-9) <= t <= hi * (1 + 1e-9)]
    if len(inside) < 2:  # a range inside one decade: fall back to linear ticks
        return [t for t in linear_ticks(lo, hi, 4) if t > 0]
    step = max(1, len(inside) // 8)
    return inside[::step]


def format_tick(v: float) -> str:
    if v == 0:
        return "0"
    a = abs(v)
    if a >= 1e5 or a < 1e-3:
        return f"{v:.0e}".replace("e-0", "e-").replace("e+0", "e")
    text = f"{v:.6g}"
    return text


# --- scales -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Scale:
    lo: float
    hi: float
    pix_lo: float
    pix_hi: float
    log: bool

    def __call__(self, v: float) -> float:
        if self.log:
            a, b, x = math.log10(self.lo), math.log10(self.hi), math.log10(max(v, 1e-300))
        else:
            a, b, x = self.lo, self.hi, v
        if b == a:
            return (self.pix_lo + self.pix_hi) / 2
        return self.pix_lo + (x - a) / (b - a) * (self.pix_hi - self.pix_lo)


def _finite(values: Sequence[float], log: bool) -> list[float]:
    return [v for v in values if v is not None and math.isfinite(v) and (v > 0 or not log)]


def _extent(values: list[float], log: bool, pad: float = 0.05) -> tuple[float, float]:
    if not values:
        return (1.0, 10.0) if log else (0.0, 1.0)
    lo, hi = min(values), max(values)
    if log:
        if hi / lo < 1.5:
            lo, hi = lo / 1.25, hi * 1.25
        f = (hi / lo) ** pad
        return lo / f, hi * f
    if hi == lo:
        w = abs(lo) * 0.1 or 1.0
        return lo - w, hi + w
    w = (hi - lo) * pad
    return lo - w, hi + w


def _data_ranges(plot: Plot) -> tuple[tuple[float, float], tuple[float, float]]:
    xs: list[float] = []
    ys: list[float] = []
    for s in plot.series:
        xs += _finite(s.x, plot.x_log)
        ys += _finite(s.y, plot.y_log)
    if plot.bars is not None:
        xs += list(plot.bars.edges)
        ys += [0.0, float(max(plot.bars.counts, default=1))]
    for r in plot.rules:
        (xs if r.axis == "x" else ys).extend(
            _finite([r.value], plot.x_log if r.axis == "x" else plot.y_log)
        )
    for b in plot.bands:
        target = xs if b.axis == "x" else ys
        target.extend(
            _finite(
                [v for v in (b.low, b.high) if v is not None],
                plot.x_log if b.axis == "x" else plot.y_log,
            )
        )
    xr = plot.x_range or _extent(xs, plot.x_log, 0.02 if plot.bars else 0.05)
    yr = plot.y_range or _extent(ys, plot.y_log)
    if plot.bars is not None and plot.y_range is None:
        yr = (0.0, yr[1])
    return xr, yr


# --- rendering ----------------------------------------------------------------------------------


def _marker(shape: str, x: float, y: float, colour: str, r: float = 3.2) -> str:
    if shape == "circle":
        return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="{r:.1f}" fill="{colour}"/>'
    if shape == "square":
        return (
            f'<rect x="{x - r:.1f}" y="{y - r:.1f}" width="{2 * r:.1f}" height="{2 * r:.1f}" '
            f'fill="{colour}"/>'
        )
    if shape == "triangle":
        corners = [(x, y - r * 1.2), (x - r * 1.1, y + r), (x + r * 1.1, y + r)]
    else:  # diamond
        corners = [(x, y - r * 1.3), (x + r, y), (x, y + r * 1.3), (x - r, y)]
    pts = " ".join(f"{cx:.1f},{cy:.1f}" for cx, cy in corners)
    return f'<polygon points="{pts}" fill="{colour}"/>'


def render_svg(plot: Plot, width: int = 540, height: int = 320) -> str:
    """The plot as one ``<svg>`` element (inline in HTML, scalable, printable)."""
    ml, mr, mt, mb = 64, 16, 30, 48
    if plot.empty:  # a short frame with the reason, not a tall blank
        height, mb = 110, 12
    _, rows = _legend_layout([label for label, _ in _legend_entries(plot)], width)
    rows = 0 if plot.empty else rows
    legend_h = 16 * rows
    total_h = height + legend_h
    px0, px1 = ml, width - mr
    py0, py1 = height - mb, mt
    out: list[str] = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="plot" viewBox="0 0 {width} {total_h}" '
        f'width="{width}" height="{total_h}" role="img" aria-label="{escape(plot.title)}" '
        f'font-family="sans-serif" font-size="11">',
        f"<title>{escape(plot.title)}</title>",
        f'<text x="{width / 2:.0f}" y="16" text-anchor="middle" font-size="13" '
        f'font-weight="bold">{escape(plot.title)}</text>',
    ]
    if plot.empty:
        out.append(
            f'<rect x="{px0}" y="{py1}" width="{px1 - px0}" height="{py0 - py1}" fill="#f4f4f4" '
            f'stroke="#999"/>'
        )
        out.append(
            f'<text x="{(px0 + px1) / 2:.0f}" y="{(py0 + py1) / 2:.0f}" text-anchor="middle">'
            f"{escape(plot.note or 'no data')}</text></svg>"
        )
        return "".join(out)
    (x_lo, x_hi), (y_lo, y_hi) = _data_ranges(plot)
    sx = _Scale(x_lo, x_hi, px0, px1, plot.x_log)
    sy = _Scale(y_lo, y_hi, py0, py1, plot.y_log)
    clip_id = f"c{abs(hash((plot.title, plot.x_label, plot.y_label))) % 10**8}"
    out.append(
        f'<defs><clipPath id="{clip_id}"><rect x="{px0}" y="{py1}" width="{px1 - px0}" '
        f'height="{py0 - py1}"/></clipPath></defs>'
    )
    out.append(
        f'<rect x="{px0}" y="{py1}" width="{px1 - px0}" height="{py0 - py1}" fill="#ffffff" '
        f'stroke="none"/>'
    )
    # grid and ticks
    xt = log_ticks(x_lo, x_hi) if plot.x_log else linear_ticks(x_lo, x_hi)
    yt = log_ticks(y_lo, y_hi) if plot.y_log else linear_ticks(y_lo, y_hi, 5)
    for t in xt:
        x = sx(t)
        out.append(f'<line x1="{x:.1f}" y1="{py0}" x2="{x:.1f}" y2="{py1}" stroke="#e3e3e3"/>')
        out.append(f'<line x1="{x:.1f}" y1="{py0}" x2="{x:.1f}" y2="{py0 + 4}" stroke="#333"/>')
        out.append(f'<text x="{x:.1f}" y="{py0 + 15}" text-anchor="middle">{format_tick(t)}</text>')
    for t in yt:
        y = sy(t)
        out.append(f'<line x1="{px0}" y1="{y:.1f}" x2="{px1}" y2="{y:.1f}" stroke="#e3e3e3"/>')
        out.append(f'<line x1="{px0 - 4}" y1="{y:.1f}" x2="{px0}" y2="{y:.1f}" stroke="#333"/>')
        out.append(f'<text x="{px0 - 6}" y="{y + 4:.1f}" text-anchor="end">{format_tick(t)}</text>')
    body: list[str] = []
    for b in plot.bands:
        if b.axis == "y":
            top = sy(b.high) if b.high is not None else py1
            bot = sy(b.low) if b.low is not None else py0
            top, bot = max(min(top, bot), py1), min(max(top, bot), py0)
            body.append(
                f'<rect x="{px0}" y="{top:.1f}" width="{px1 - px0}" '
                f'height="{max(bot - top, 0):.1f}" '
                f'fill="{b.colour}" fill-opacity="{b.opacity}"/>'
            )
        else:
            left = sx(b.low) if b.low is not None else px0
            right = sx(b.high) if b.high is not None else px1
            left, right = max(min(left, right), px0), min(max(left, right), px1)
            body.append(
                f'<rect x="{left:.1f}" y="{py1}" width="{max(right - left, 0):.1f}" '
                f'height="{py0 - py1}" fill="{b.colour}" fill-opacity="{b.opacity}"/>'
            )
    if plot.bars is not None:
        bars = plot.bars
        for i, n in enumerate(bars.counts):
            if n <= 0:
                continue
            x0, x1 = sx(bars.edges[i]), sx(bars.edges[i + 1])
            y = sy(n)
            body.append(
                f'<rect x="{x0:.1f}" y="{y:.1f}" width="{max(x1 - x0 - 1, 2.0):.1f}" '
                f'height="{py0 - y:.1f}" fill="{bars.colour}" stroke="#1f4e6e" stroke-width="0.5"/>'
            )
    for r in plot.rules:
        if r.axis == "y":
            y = sy(r.value)
            body.append(
                f'<line x1="{px0}" y1="{y:.1f}" x2="{px1}" y2="{y:.1f}" stroke="{r.colour}" '
                f'stroke-width="1.5" stroke-dasharray="{r.dash}"/>'
            )
        else:
            x = sx(r.value)
            body.append(
                f'<line x1="{x:.1f}" y1="{py0}" x2="{x:.1f}" y2="{py1}" stroke="{r.colour}" '
                f'stroke-width="1.5" stroke-dasharray="{r.dash}"/>'
            )
    for i, s in enumerate(plot.series):
        k = s.style if s.style is not None else i
        colour, shape, dash = (
            PALETTE[k % len(PALETTE)],
            MARKERS[k % len(MARKERS)],
            DASHES[k % len(DASHES)],
        )
        pts = [
            (sx(x), sy(y))
            for x, y in zip(s.x, s.y, strict=True)
            if x is not None
            and y is not None
            and math.isfinite(x)
            and math.isfinite(y)
            and (x > 0 or not plot.x_log)
            and (y > 0 or not plot.y_log)
        ]
        if s.line and len(pts) > 1:
            path = " ".join(f"{x:.1f},{y:.1f}" for x, y in pts)
            dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
            body.append(
                f'<polyline points="{path}" fill="none" stroke="{colour}" stroke-width="1.6"'
                f"{dash_attr}/>"
            )
        if s.markers:
            body.extend(_marker(shape, x, y, colour) for x, y in pts)
    out.append(f'<g clip-path="url(#{clip_id})">{"".join(body)}</g>')
    out.append(
        f'<rect x="{px0}" y="{py1}" width="{px1 - px0}" height="{py0 - py1}" fill="none" '
        f'stroke="#333"/>'
    )
    out.append(
        f'<text x="{(px0 + px1) / 2:.0f}" y="{height - 12}" text-anchor="middle">'
        f"{escape(plot.x_label)}</text>"
    )
    out.append(
        f'<text x="14" y="{(py0 + py1) / 2:.0f}" text-anchor="middle" '
        f'transform="rotate(-90 14 {(py0 + py1) / 2:.0f})">{escape(plot.y_label)}</text>'
    )
    out.append(_legend(plot, height, width))
    out.append("</svg>")
    return "".join(out)


#: Average glyph width of 11 px sans-serif, for laying out legend entries (no font metrics
#: are available when the SVG is written; a slight overestimate keeps entries apart).
_CHAR_PX = 6.3


def _legend_entries(plot: Plot) -> list[tuple[str, Callable[[float, float], str]]]:
    """(label, swatch drawer at x, y) for every labelled element of the plot."""
    entries: list[tuple[str, Callable[[float, float], str]]] = []
    for i, s in enumerate(plot.series):
        k = s.style if s.style is not None else i
        colour, shape, dash = (
            PALETTE[k % len(PALETTE)],
            MARKERS[k % len(MARKERS)],
            DASHES[k % len(DASHES)],
        )

        def series_swatch(x: float, y: float, s=s, colour=colour, shape=shape, dash=dash) -> str:
            out = ""
            if s.line:
                dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
                out += (
                    f'<line x1="{x:.1f}" y1="{y + 6:.1f}" x2="{x + 22:.1f}" y2="{y + 6:.1f}" '
                    f'stroke="{colour}" stroke-width="1.6"{dash_attr}/>'
                )
            if s.markers:
                out += _marker(shape, x + 11, y + 6, colour)
            return out

        entries.append((s.label, series_swatch))
    for b in plot.bands:
        if b.label:

            def band_swatch(x: float, y: float, b: Band = b) -> str:
                return (
                    f'<rect x="{x:.1f}" y="{y:.1f}" width="22" height="12" fill="{b.colour}" '
                    f'fill-opacity="{max(b.opacity, 0.25)}" stroke="#666" stroke-width="0.5"/>'
                )

            entries.append((b.label, band_swatch))
    for r in plot.rules:
        if r.label:

            def rule_swatch(x: float, y: float, r: Rule = r) -> str:
                return (
                    f'<line x1="{x:.1f}" y1="{y + 6:.1f}" x2="{x + 22:.1f}" y2="{y + 6:.1f}" '
                    f'stroke="{r.colour}" stroke-width="1.5" stroke-dasharray="{r.dash}"/>'
                )

            entries.append((r.label, rule_swatch))
    if plot.bars is not None:
        bars = plot.bars
        entries.append(
            (
                bars.label,
                lambda x, y: (
                    f'<rect x="{x:.1f}" y="{y:.1f}" width="22" height="12" fill="{bars.colour}"/>'
                ),
            )
        )
    return entries


def _legend_layout(labels: Sequence[str], width: int) -> tuple[list[tuple[float, int]], int]:
    """Flow the entries left to right, wrapping at the plot width: (x, row) each, rows."""
    places: list[tuple[float, int]] = []
    x, row = 10.0, 0
    for label in labels:
        w = 28 + _CHAR_PX * len(label) + 16
        if x > 10 and x + w > width - 6:
            x, row = 10.0, row + 1
        places.append((x, row))
        x += w
    return places, (row + 1 if labels else 0)


def _legend(plot: Plot, top: float, width: int) -> str:
    entries = _legend_entries(plot)
    places, _ = _legend_layout([label for label, _ in entries], width)
    items = []
    for (label, swatch), (x, row) in zip(entries, places, strict=True):
        y = top + 4 + row * 16
        items.append(swatch(x, y))
        items.append(f'<text x="{x + 28:.1f}" y="{y + 10:.1f}">{escape(label)}</text>')
    return f'<g class="legend">{"".join(items)}</g>'


def histogram(
    values: Iterable[float], *, bins: int | None = None, include: Sequence[float] = ()
) -> tuple[tuple[float, ...], tuple[int, ...]]:
    """Equal-width bins over the values (and ``include``, e.g. limits, so they show).

    The bin count defaults to Sturges' rule, ceil(log2 n) + 1, capped at 40 (common practice)."""
    import numpy as np

    v = np.asarray([x for x in values if x is not None and math.isfinite(x)], dtype=float)
    if v.size == 0:
        return (), ()
    n_bins = bins or min(40, max(5, math.ceil(math.log2(v.size)) + 1))
    lo, hi = float(v.min()), float(v.max())
    extra = [x for x in include if x is not None and math.isfinite(x)]
    # limits far outside the data would squash the bars: include them only when near
    span = (hi - lo) or (abs(hi) * 0.1 or 1.0)
    for x in extra:
        if lo - 2 * span <= x <= hi + 2 * span:
            lo, hi = min(lo, x), max(hi, x)
    if hi == lo:
        lo, hi = lo - span / 2, hi + span / 2
    counts, edges = np.histogram(v, bins=n_bins, range=(lo, hi))
    return tuple(float(e) for e in edges), tuple(int(c) for c in counts)
