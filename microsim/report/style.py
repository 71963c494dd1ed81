"""The report's visual style, and turning a figure into SVG and PNG bytes.

Neutral and plain: dark ink, a few muted tones that differ in lightness, and series told
apart by line style or marker as well as by tone, so every figure still reads when printed
in greyscale. Figures are built on `matplotlib.figure.Figure` directly (never pyplot), so
nothing opens a window and the Agg renderer draws the PNG.
"""
from __future__ import annotations

import io
import textwrap
from contextlib import contextmanager

import matplotlib
from matplotlib.figure import Figure

INK = "#222222"  # text, axes, analytic counterparts, reference lines
GRID = "#d9d9d9"
PAPER = "#ffffff"
TONES = ("#2f4858", "#8a6d3b", "#6c8b74", "#8c5f66", "#5d6d7e", "#a39b8b")  # dark to light
LINES = ("-", (0, (5, 2)), (0, (1.5, 1.5)), (0, (6, 2, 1.5, 2)), (0, (3, 1, 1, 1, 1, 1)))
MARKERS = ("o", "^", "s", "D", "v", "P")
BAND_ALPHA = 0.22  # Monte-Carlo bands: a light wash of the series' tone
Z95 = 1.959963984540054  # the two-sided 95% normal quantile (scipy.stats.norm.ppf(0.975))

RC = {
    "font.family": "DejaVu Sans", "font.size": 8.5, "axes.titlesize": 9,
    "axes.labelsize": 8.5, "legend.fontsize": 7.5, "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5, "axes.edgecolor": INK, "axes.labelcolor": INK, "text.color": INK,
    "xtick.color": INK, "ytick.color": INK, "axes.spines.top": False,
    "axes.spines.right": False, "axes.grid": True, "grid.color": GRID, "grid.linewidth": 0.6,
    "axes.axisbelow": True, "legend.frameon": False, "figure.facecolor": PAPER,
    "axes.facecolor": PAPER, "savefig.facecolor": PAPER, "svg.hashsalt": "microsim-report",
    "svg.fonttype": "path", "axes.formatter.use_locale": False,
}


@contextmanager
def house_style():
    """Draw inside this: the report's settings, without touching the caller's matplotlib."""
    with matplotlib.rc_context(RC):
        yield


def series_style(index: int) -> dict:
    """Tone, line style and marker of the index-th series (strategy or state)."""
    return {"color": TONES[index % len(TONES)], "linestyle": LINES[index % len(LINES)],
            "marker": MARKERS[index % len(MARKERS)]}


def wrapped(text: str, width: int = 28) -> str:
    """Long labels (strategy and state labels) on a few short lines."""
    return "\n".join(textwrap.wrap(text, width)) or text


def new_figure(width: float, height: float) -> Figure:
    return Figure(figsize=(width, height), layout="constrained")


def rendered(figure: Figure) -> dict[str, bytes]:
    """The figure as SVG and PNG bytes (no dates in the SVG, so reruns give equal files)."""
    out = {}
    for fmt, options in (("svg", {"metadata": {"Date": None}}), ("png", {"dpi": 150})):
        buffer = io.BytesIO()
        with house_style():
            figure.savefig(buffer, format=fmt, **options)
        out[fmt] = buffer.getvalue()
    return out
