"""The SVG plotting helper: well-formed SVG, honest ticks and histograms, data where drawn."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from harness.report.plot import (
    Band,
    Bars,
    Plot,
    Rule,
    Series,
    histogram,
    linear_ticks,
    log_ticks,
    nice_step,
    render_svg,
)

SVG = "{http://www.w3.org/2000/svg}"


def _parse(svg: str) -> ET.Element:
    return ET.fromstring(svg)  # raises on malformed XML


@pytest.mark.parametrize("span", [1.0, 7.3, 0.034, 250.0, 12.0, 3e-7, 9.99e5])
def test_nice_step_is_1_2_5(span: float) -> None:
    """Tick steps are 1, 2 or 5 × 10^k and give 2.4 to 6 intervals (common practice)."""
    step = nice_step(span, target=6)
    mantissa = step / 10 ** math.floor(math.log10(step) + 1e-12)
    assert round(mantissa, 9) in (1.0, 2.0, 5.0)
    assert 2.4 <= span / step <= 6.0 + 1e-9


def test_linear_ticks_cover_range_inside_it() -> None:
    ticks = linear_ticks(18.3, 21.7)
    assert ticks[0] >= 18.3 and ticks[-1] <= 21.7
    assert np.allclose(np.diff(ticks), ticks[1] - ticks[0])
    assert 0.0 in linear_ticks(-1.0, 1.0)


def test_log_ticks_are_decades_and_2_5() -> None:
    assert log_ticks(0.01, 2.0) == pytest.approx([0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0])
    wide = log_ticks(1e-6, 1e3)
    assert all(math.log10(t) == round(math.log10(t)) for t in wide)


def test_histogram_counts_match_numpy() -> None:
    """Counts against numpy.histogram over the same range (reference: numpy.histogram);
    default bin count is Sturges' rule ceil(log2 n) + 1 (common practice)."""
    rng = np.random.default_rng(3)
    v = rng.normal(20.0, 0.3, 500)
    edges, counts = histogram(v)
    ref, ref_edges = np.histogram(v, bins=len(counts), range=(v.min(), v.max()))
    assert len(counts) == math.ceil(math.log2(500)) + 1
    assert list(counts) == list(ref) and np.allclose(edges, ref_edges)
    assert sum(counts) == 500
    # a limit near the data widens the range so it shows; a far one does not squash it
    e2, _ = histogram(v, include=[18.5])
    assert e2[0] == pytest.approx(18.5)
    e3, _ = histogram(v, include=[-1000.0])
    assert e3[0] == pytest.approx(v.min())


def test_svg_is_wellformed_and_draws_every_element() -> None:
    p = Plot(
        "gain <left> & right",
        "level (Vrms)",
        "gain (dB)",
        series=(
            Series((0.01, 0.1, 1.0), (20.0, 20.1, 18.0), "gain"),
            Series((1.0,), (18.0,), "clipped", line=False, style=1),
        ),
        bands=(Band(19.0, 21.0, "limits"),),
        rules=(Rule(0.8, "clip", axis="x"),),
        x_log=True,
    )
    root = _parse(render_svg(p))
    assert root.tag == f"{SVG}svg"
    assert root.find(f"{SVG}title").text == "gain <left> & right"
    polylines = root.findall(f".//{SVG}polyline")
    assert len(polylines) == 1 and len(polylines[0].get("points").split()) == 3
    assert root.findall(f".//{SVG}circle")  # markers of the first series
    texts = [t.text for t in root.iter(f"{SVG}text")]
    assert "gain" in texts and "limits" in texts and "clip" in texts
    assert "0.01" in texts and "1" in texts  # log-axis tick labels


def test_markers_follow_the_data() -> None:
    """A point at the top-right of the data range lands at the top-right of the plot area."""
    p = Plot(
        "t",
        "x",
        "y",
        series=(Series((0.0, 10.0), (0.0, 5.0), "s", line=False),),
        x_range=(0.0, 10.0),
        y_range=(0.0, 5.0),
    )
    root = _parse(render_svg(p, width=500, height=300))
    (c0, c1) = root.findall(f".//{SVG}circle")[:2]
    assert float(c1.get("cx")) > float(c0.get("cx"))
    assert float(c1.get("cy")) < float(c0.get("cy"))  # SVG y grows downwards


def test_empty_plot_says_why() -> None:
    root = _parse(render_svg(Plot("spectrum", "", "", note="this run kept no raw records")))
    assert "this run kept no raw records" in [t.text for t in root.iter(f"{SVG}text")]
    bars = Plot("h", "x", "n", bars=Bars((0.0, 1.0, 2.0), (3, 4), "boards"))
    assert len(_parse(render_svg(bars)).findall(f".//{SVG}rect")) >= 2 + 2
