"""How the report's figures look and how they reach the page.

The matplotlib settings, the colours, fixed layouts in inches, the legend
above the axes, and the step from a figure to inline SVG (ids unique in the
page, coordinates rounded) and PNG. Colours come from the Okabe-Ito palette
and the cividis map, and every series also differs by marker or line style,
so nothing relies on hue alone.
"""

from __future__ import annotations

import io
import re
from dataclasses import dataclass

import matplotlib as mpl
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

__all__ = ["OKABE_ITO", "MAP_CMAP", "REPORT_RC", "ReportFigure", "new_figure", "axes_grid", "legend_top",
           "legend_rows", "svg_inline", "finish_figure", "runs_style", "RUN_MET", "RUN_MISSED", "LIMIT_LINE",
           "limit_handle"]

#: Okabe & Ito (2008), "Color universal design": eight colours that stay
#: distinct for the common forms of colour-blindness.
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}
#: Sequential map for the joint figure and the objective: cividis reads the
#: same in grey and for colour-blind readers (monotone lightness).
MAP_CMAP = "cividis"
#: Resolution of the PNG copies of the figures.
PNG_DPI = 100

#: matplotlib settings of every figure.
REPORT_RC = {
    "font.size": 9.0,
    "axes.titlesize": 9.5,
    "axes.labelsize": 9.0,
    "legend.fontsize": 8.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#d9d9d9",
    "grid.linewidth": 0.6,
    "hatch.linewidth": 0.8,
    # names come from the protocol: never read "$...$" in them as mathtext
    "text.parse_math": False,
    # text as paths: the SVG looks the same whatever fonts the reader has
    "svg.fonttype": "path",
}
#: Legend texts shared by the figures.
RUN_MET = "run that met every limit"
RUN_MISSED = "run that missed (or lacks) a limit"
#: How a limit is drawn (a line at each bound) and shown in a legend.
LIMIT_LINE = dict(color=OKABE_ITO["vermillion"], ls="--", lw=1.4)


@dataclass(frozen=True)
class ReportFigure:
    """One plot of the report, as inline SVG and as PNG."""

    name: str  # file stem, e.g. "slices-1"
    title: str
    caption: str
    svg: str
    png: bytes


def new_figure(width: float, height: float) -> Figure:
    """A figure of the given size in inches, with no layout engine.

    The layout is fixed in inches (see :func:`axes_grid`): the automatic
    layout engines cost as much as drawing the figure, and a report draws
    dozens of axes.
    """
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    return fig


def axes_grid(fig: Figure, nrows: int, ncols: int, *, left: float, right: float, top: float,
              bottom: float, wgap: float, hgap: float, **kw):
    """A grid of axes with margins and gaps given in inches, array of shape (nrows, ncols)."""
    W, H = fig.get_figwidth(), fig.get_figheight()
    pw = (W - left - right - (ncols - 1) * wgap) / ncols
    ph = (H - top - bottom - (nrows - 1) * hgap) / nrows
    gs = fig.add_gridspec(nrows, ncols, left=left / W, right=1 - right / W, top=1 - top / H,
                          bottom=bottom / H, wspace=wgap / pw, hspace=hgap / ph, **kw)
    return np.array([[fig.add_subplot(gs[r, c]) for c in range(ncols)] for r in range(nrows)])


def legend_top(fig: Figure, handles, ncol: int) -> None:
    """One legend for the whole figure, centred above the axes."""
    fig.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 1.0 - 0.04 / fig.get_figheight()),
               ncol=ncol, frameon=False, handlelength=1.8, columnspacing=1.4)


def legend_rows(n: int, ncol: int) -> float:
    """Height in inches of a legend of n entries in ncol columns."""
    return 0.22 * (-(-n // ncol)) + 0.12


_SVG_ID = re.compile(r'(\bid="|href="#|url\(#)([^")]+)')
_PATH_DATA = re.compile(r'(\sd=")([^"]*)"')
_XY = re.compile(r'(\s[xy]=")([^"]*)"')
_NUMBER = re.compile(r"-?\d+\.\d{3,}")


def _round2(m: re.Match) -> str:
    text = f"{float(m.group(0)):.2f}".rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def svg_inline(data: bytes, prefix: str, label: str) -> str:
    """The <svg> element alone: no XML prolog, no metadata, ids unique in the page."""
    text = data.decode("utf-8")
    text = text[text.index("<svg"):]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    # coordinates are in points: two decimals are far below what a screen shows, and the
    # page is a third smaller
    text = _PATH_DATA.sub(lambda m: m.group(1) + _NUMBER.sub(_round2, m.group(2)) + '"', text)
    text = _XY.sub(lambda m: m.group(1) + _NUMBER.sub(_round2, m.group(2)) + '"', text)
    ids = set(re.findall(r'\bid="([^"]+)"', text))
    text = _SVG_ID.sub(lambda m: m.group(1) + (f"{prefix}-{m.group(2)}" if m.group(2) in ids else m.group(2)),
                       text)
    # matplotlib gives identical images (two colour bars of one map) the same id: number
    # the repeats, so that every id in the page is unique (references keep the first)
    seen: dict[str, int] = {}

    def unique(m: re.Match) -> str:
        n = seen.get(m.group(1), 0)
        seen[m.group(1)] = n + 1
        return m.group(0) if n == 0 else f'id="{m.group(1)}-{n}"'

    text = re.sub(r'\bid="([^"]+)"', unique, text)
    label = (label.replace("&", "&amp;").replace('"', "&quot;").replace("<", "&lt;").replace(">", "&gt;"))
    return text.replace("<svg", f'<svg role="img" aria-label="{label}"', 1).strip()


def finish_figure(fig: Figure, name: str, title: str, caption: str, salt: str) -> ReportFigure:
    """The figure as inline SVG (ids prefixed by ``name``, salted hashes) and as PNG."""
    svg = io.BytesIO()
    png = io.BytesIO()
    with mpl.rc_context({"svg.hashsalt": f"{salt}-{name}", "svg.fonttype": "path"}):
        fig.savefig(svg, format="svg", metadata={"Date": None})
    fig.savefig(png, format="png", dpi=PNG_DPI)
    return ReportFigure(name, title, caption,
                        svg_inline(svg.getvalue(), name, title), png.getvalue())


def runs_style() -> tuple[dict, dict]:
    """Scatter styles of the runs that met every limit and of those that did not."""
    return (
        dict(marker="o", s=22, facecolor=OKABE_ITO["black"], edgecolor=OKABE_ITO["black"], linewidths=0.6,
             zorder=4),
        dict(marker="^", s=28, facecolor="white", edgecolor=OKABE_ITO["vermillion"], linewidths=1.3, zorder=4),
    )


def limit_handle() -> Line2D:
    """The legend entry of a limit line."""
    return Line2D([], [], **LIMIT_LINE, label="limit")
