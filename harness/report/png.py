"""Optional PNG copies of the report plots, drawn by matplotlib when it is installed.

The HTML report never needs this (its plots are inline SVG); PNGs are for pasting into
documents or tickets.  matplotlib is imported only here and only when asked for.
"""

from __future__ import annotations

import itertools
import re
from pathlib import Path

from harness.errors import ReportError
from harness.report.plot import DASHES, MARKERS, PALETTE, Plot

_MPL_MARKERS = {"circle": "o", "square": "s", "triangle": "^", "diamond": "D"}


def _pyplot():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise ReportError(
            "--png",
            "PNG plots need matplotlib, which is not installed",
            hint="pip install matplotlib, or leave out --png: the HTML report has its plots "
            "inline as SVG and needs nothing else",
        ) from None
    return plt


def _dash(pattern: str) -> tuple[int, tuple[float, ...]] | str:
    if not pattern:
        return "-"
    return (0, tuple(float(x) for x in pattern.split()))


def slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9]+", "-", text).strip("-").lower() or "plot"


def write_pngs(plots: list[Plot], folder: str | Path, *, dpi: int = 110) -> list[Path]:
    """Draw each plot to ``folder/<title>.png``; return the paths."""
    plt = _pyplot()
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    paths: list[Path] = []
    for plot in plots:
        fig, ax = plt.subplots(figsize=(6.4, 3.8))
        ax.set_title(plot.title)
        if plot.empty:
            ax.text(
                0.5, 0.5, plot.note or "no data", ha="center", va="center", transform=ax.transAxes
            )
            ax.set_xticks([])
            ax.set_yticks([])
        else:
            ax.set_xlabel(plot.x_label)
            ax.set_ylabel(plot.y_label)
            if plot.bars is not None and plot.bars.counts:
                e = plot.bars.edges
                ax.bar(
                    e[:-1],
                    plot.bars.counts,
                    width=[b - a for a, b in itertools.pairwise(e)],
                    align="edge",
                    color=plot.bars.colour,
                    label=plot.bars.label,
                )
            for r in plot.rules:
                line = ax.axhline if r.axis == "y" else ax.axvline
                line(r.value, color=r.colour, linestyle=_dash(r.dash), label=r.label or None)
            for i, s in enumerate(plot.series):
                k = s.style if s.style is not None else i
                ax.plot(
                    s.x,
                    s.y,
                    color=PALETTE[k % len(PALETTE)],
                    linestyle=_dash(DASHES[k % len(DASHES)]) if s.line else "none",
                    marker=_MPL_MARKERS[MARKERS[k % len(MARKERS)]] if s.markers else None,
                    markersize=4,
                    label=s.label,
                )
            if plot.x_log:
                ax.set_xscale("log")
            if plot.y_log:
                ax.set_yscale("log")
            if plot.x_range:
                ax.set_xlim(*plot.x_range)
            if plot.y_range:
                ax.set_ylim(*plot.y_range)
            # bands last, over the final limits, so an open side (None) runs to the edge
            # without stretching a log axis towards zero
            xlim, ylim = ax.get_xlim(), ax.get_ylim()
            for b in plot.bands:
                edge = ylim if b.axis == "y" else xlim
                lo = b.low if b.low is not None else edge[0]
                hi = b.high if b.high is not None else edge[1]
                span = ax.axhspan if b.axis == "y" else ax.axvspan
                span(lo, hi, color=b.colour, alpha=b.opacity, label=b.label or None, zorder=0)
            ax.set_xlim(*xlim)
            ax.set_ylim(*ylim)
            ax.grid(True, color="#e3e3e3")
            ax.legend(fontsize=7)
        fig.tight_layout()
        path = out / f"{len(paths) + 1:02d}-{slug(plot.title)}.png"
        fig.savefig(path, dpi=dpi)
        plt.close(fig)
        paths.append(path)
    return paths
