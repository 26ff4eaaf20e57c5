"""The pack's look: palette, figure helpers and PNG rendering.

Colours are drawn from the Okabe & Ito (2008) colour-universal-design set, an open standard
that stays distinguishable under the common forms of colour-vision deficiency; every series
also differs by marker or line style, so nothing depends on colour alone. Figures are built
on explicit :class:`matplotlib.figure.Figure` objects (no pyplot state) and closed by being
dropped after rendering.
"""
from __future__ import annotations

import io

from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter

__all__ = ["INK", "MUTED", "GRID", "PAPER", "ACCENT", "PASS", "FAIL", "OPEN", "RULE_COLOURS",
           "EQUAL_COLOUR", "rule_colour", "new_figure", "style_axes", "png", "pct_axis",
           "LINESTYLES", "MARKERS"]

INK = "#1f2430"        # text and axes
MUTED = "#6b7280"      # secondary text
GRID = "#e3e6ea"
PAPER = "#fbfaf7"      # page background in the HTML
ACCENT = "#234e70"     # section rules and headings (deep teal-blue)
PASS = "#0072B2"       # Okabe-Ito blue: passed
FAIL = "#D55E00"       # Okabe-Ito vermillion: failed
OPEN = "#7a7a7a"       # grey: not assessed

#: Colours for rules in study order (1/N has its own): Okabe-Ito blue, vermillion, bluish
#: green, reddish purple, orange, sky blue.
RULE_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9")
EQUAL_COLOUR = "#000000"
LINESTYLES = ("-", "--", "-.", (0, (1, 1.2)), (0, (5, 1, 1, 1, 1, 1)), (0, (3, 1.5)))
MARKERS = ("o", "s", "^", "D", "v", "P")

FONT = 8.5        # points, at the printed width of 7 inches


def rule_colour(index: int, name: str) -> str:
    if name == "equal-weight":
        return EQUAL_COLOUR
    return RULE_COLOURS[index % len(RULE_COLOURS)]


def new_figure(width: float, height: float) -> Figure:
    """A figure in inches (printed size), constrained layout so labels never overlap."""
    fig = Figure(figsize=(width, height), dpi=100, layout="constrained", facecolor="white")
    return fig


def style_axes(ax, *, xlabel: str = "", ylabel: str = "", title: str = "", grid: str = "both") -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(MUTED)
        ax.spines[side].set_linewidth(0.7)
    ax.tick_params(colors=INK, labelsize=FONT - 0.5, length=3, width=0.6)
    if grid:
        ax.grid(True, axis=grid, color=GRID, linewidth=0.6)
        ax.set_axisbelow(True)
    if xlabel:
        ax.set_xlabel(xlabel, fontsize=FONT, color=INK)
    if ylabel:
        ax.set_ylabel(ylabel, fontsize=FONT, color=INK)
    if title:
        ax.set_title(title, fontsize=FONT + 0.5, color=INK, loc="left", fontweight="bold")


def pct_axis(axis, decimals=None, nbins: int = 6) -> None:
    """Show decimal values on ``axis`` (ax.xaxis / ax.yaxis) as percentages, with at most
    ``nbins`` intervals so tick labels never run into each other."""
    from matplotlib.ticker import MaxNLocator

    axis.set_major_locator(MaxNLocator(nbins=nbins, steps=[1, 2, 2.5, 5, 10]))
    axis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=decimals))


def plain_axis(axis, decimals: int = 2) -> None:
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.{decimals}f}"))


def png(fig: Figure, dpi: int = 180) -> bytes:
    """Render once with Agg and encode as an RGB PNG (fast zlib level; figures are flat
    colour so they stay small)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    fig.set_dpi(dpi)
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    w, h = canvas.get_width_height(physical=True)
    img = Image.frombuffer("RGBA", (w, h), canvas.buffer_rgba(), "raw", "RGBA", 0, 1).convert("RGB")
    buf = io.BytesIO()
    img.save(buf, format="PNG", compress_level=3, dpi=(dpi, dpi))
    return buf.getvalue()
