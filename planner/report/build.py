"""The report of a planning step: one self-contained HTML file, with plots.

A report shows what a careful reader needs to judge one planning step: the
cautions first, the fingerprints of the inputs and the decision log, the
proposed batch with every ranking value, one-factor slices of every model
through each proposal, a map of the joint figure over two factors, the
exclusions and near misses, the model checks and the run history.

The page has no script, no style sheet and no image outside itself: plots
are inline SVG made by matplotlib (the same plots are also written as PNG
files beside it). The page is rendered by Jinja2 with autoescaping, so a
factor or study name from the protocol or the runs file is always shown as
text, never read as markup. Colours come from the Okabe-Ito palette and the
cividis map, and every series also differs by marker or line style, so
nothing relies on hue alone.

Folder layout written by :func:`report_folder` (next to the decision log)::

    report-<step_label>.html
    figures-<step_label>/<name>.png
"""

from __future__ import annotations

import hashlib
import io
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import matplotlib as mpl
import numpy as np
from jinja2 import Environment, FileSystemLoader, StrictUndefined
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PatchCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Rectangle
from matplotlib.ticker import MaxNLocator

from guardband.planner import __version__
from guardband.planner.errors import ProtocolError, VerificationError
from guardband.planner.app.fileio import atomic_write_bytes, atomic_write_text
from guardband.planner.inputs.runs import RunsTable, read_runs
from guardband.planner.models.checks import looks_overconfident
from guardband.planner.settings import COVERAGE_MIN_RUNS, COVERAGE_WARNING, FEASIBILITY_TOL, Z95
from guardband.planner.step import PlanResult, safe_runs_mask
from guardband.planner.app.textable import format_cell

from guardband.safety import cautions as _cautions
from guardband.safety import ledger
from guardband.safety.limits import ScreenRules
from guardband.safety.screen import REASONS, forbidden_mask

__all__ = [
    "OKABE_ITO",
    "COVERAGE_WARNING",
    "COVERAGE_MIN_RUNS",
    "ReportFigure",
    "Report",
    "ReportFiles",
    "SliceData",
    "MapData",
    "build_report",
    "write_report",
    "report_folder",
    "report_plan",
    "slice_data",
    "map_data",
    "default_map_factors",
    "model_warnings",
]

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
#: Points along a slice of a continuous factor, and per axis of the map.
SLICE_POINTS = 61
#: Columns of a slice figure before it wraps to a new block of rows.
SLICE_MAX_COLUMNS = 6
MAP_POINTS = 61
#: Cells of an all-discrete map that get their value written in.
MAP_ANNOTATE_MAX = 80
PNG_DPI = 100
#: A component within this share of its range from a bound counts as on the bound.
BOUND_TOL = 1e-6
#: A constraint row whose slope along a slice is smaller than this does not limit it.
_SLOPE_TOL = 1e-15

_TEMPLATES = Path(__file__).resolve().parent / "templates"
_RC = {
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


# ------------------------------------------------------------------ results
@dataclass(frozen=True)
class ReportFigure:
    """One plot of the report, as inline SVG and as PNG."""

    name: str  # file stem, e.g. "slices-1"
    title: str
    caption: str
    svg: str
    png: bytes


@dataclass(frozen=True)
class Report:
    """A rendered report, not yet written.

    Attributes
    ----------
    step_label : str
    html : str
        The whole page.
    figures : tuple of ReportFigure
    problems : tuple of str
        What the reader must know before trusting the page (a re-run that
        differs from the record, a superseded record); also on the page.
    """

    step_label: str
    html: str
    figures: tuple[ReportFigure, ...]
    problems: tuple[str, ...] = ()


@dataclass(frozen=True)
class ReportFiles:
    """What :func:`write_report` wrote."""

    step_label: str
    record_index: int | None
    html: Path
    figures: tuple[Path, ...]
    problems: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {
            "step_label": self.step_label,
            "record_index": self.record_index,
            "html": str(self.html),
            "figures": [str(p) for p in self.figures],
            "problems": list(self.problems),
        }


@dataclass(frozen=True)
class SliceData:
    """A one-factor slice through a point, with every model's prediction.

    Attributes
    ----------
    factor : int
        Index of the factor that moves.
    t : array of shape (n,)
        Its values along the slice.
    X : array of shape (n, n_factors)
        The points, in protocol units (inside the design space).
    mean, sd : dict of str to array of shape (n,)
        Per response; None where the response has no model. The objective
        is the latent response; a limit is a new measurement (noise
        included), as the screen uses it.
    discrete : bool
    mixture : bool
        True when the other components move in proportion to keep the total.
    """

    factor: int
    t: np.ndarray
    X: np.ndarray
    mean: dict
    sd: dict
    discrete: bool
    mixture: bool


@dataclass(frozen=True)
class MapData:
    """The joint figure and the objective over two factors.

    Attributes
    ----------
    factors : (int, int)
        Indices of the x and y factors.
    gx, gy : arrays of shape (nx,), (ny,)
        Grid values of each factor.
    X : array of shape (ny, nx, n_factors)
        The points, in protocol units.
    inside : bool array of shape (ny, nx)
        Whether each point lies in the design space.
    forbidden : bool array of shape (ny, nx)
    joint, objective : arrays of shape (ny, nx)
        NaN outside the design space.
    """

    factors: tuple[int, int]
    gx: np.ndarray
    gy: np.ndarray
    X: np.ndarray
    inside: np.ndarray
    forbidden: np.ndarray
    joint: np.ndarray
    objective: np.ndarray


# ------------------------------------------------------------- geometry
class _Geometry:
    """Which factors move, how a mixture keeps its total, and the models."""

    def __init__(self, result: PlanResult):
        self.result = result
        self.protocol = p = result.protocol
        self.space = space = result.space
        chk = space.check()
        self.ranges = np.asarray(chk.ranges)
        self.centre = np.asarray(chk.centre)
        self.free = np.asarray(space.free, dtype=bool)
        self.d = len(p.factors)
        self.levels = {int(j): np.asarray(lv, dtype=float) for j, lv in space.levels.items()}
        self.component = np.array([f.kind == "component" for f in p.factors])
        self.total = float(p.mixture.total) if p.mixture is not None else None
        self.free_idx = np.flatnonzero(self.free)
        self.rules = ScreenRules.from_protocol(p)

    def feasible_levels(self, j: int) -> np.ndarray:
        lv = self.levels[j]
        tol = FEASIBILITY_TOL * max(1.0, float(np.max(np.abs(lv))))
        lo, hi = self.ranges[j]
        return lv[(lv >= lo - tol) & (lv <= hi + tol)]

    def move(self, x0: np.ndarray, values: dict[int, np.ndarray]) -> np.ndarray:
        """Points that take ``values`` for some factors and x0 for the rest.

        When a moved factor is a mixture component, the other free
        components (see :meth:`adjusted`) are scaled in proportion so that
        the total holds: x_k = x0_k (total - fixed - moved) / rest, where
        ``rest`` is their sum at x0 and ``fixed`` the sum of the components
        that stay.
        """
        n = len(next(iter(values.values())))
        X = np.repeat(np.asarray(x0, dtype=float)[None, :], n, axis=0)
        for k, v in values.items():
            X[:, k] = v
        moved = [k for k in values if self.component[k]]
        if moved and self.total is not None:
            others = self.adjusted(x0, values)
            fixed = sum(float(x0[k]) for k in np.flatnonzero(self.component)
                        if k not in others and k not in values)
            remaining = self.total - fixed - X[:, moved].sum(axis=1)
            rest = float(np.sum(x0[others])) if others else 0.0
            if others and rest > 0:
                X[:, others] = x0[others][None, :] * (remaining / rest)[:, None]
            elif others:
                X[:, others] = (remaining / len(others))[:, None]
        return X

    def adjusted(self, x0: np.ndarray, moved) -> list[int]:
        """The components that keep the total when ``moved`` change.

        The free components that are not moved, less those that sit on one
        of their bounds at x0: scaling those would leave the design space at
        once (a proposal often sits on a bound), so they stay where they
        are. When every one of them sits on a bound, all of them adjust.
        """
        others = [int(k) for k in np.flatnonzero(self.component & self.free) if k not in moved]
        span = np.maximum(self.ranges[:, 1] - self.ranges[:, 0], 1.0e-300)
        lo, hi = self.space.lower, self.space.upper
        inner = [k for k in others
                 if min(x0[k] - lo[k], hi[k] - x0[k]) > BOUND_TOL * span[k]]
        return inner or others

    def moves_in_proportion(self, factors: Sequence[int]) -> bool:
        return self.total is not None and any(self.component[k] for k in factors)

    def can_move(self, factors: Sequence[int]) -> bool:
        """False when moving these factors is impossible (mixture: nothing left to adjust)."""
        if not self.moves_in_proportion(factors):
            return True
        others = [k for k in np.flatnonzero(self.component & self.free) if k not in factors]
        return bool(others)

    def segment(self, x0: np.ndarray, j: int) -> tuple[float, float]:
        """Range of factor j along its slice through x0 (the path is a line)."""
        X = self.move(x0, {j: np.array([0.0, 1.0])})
        base, D = X[0], X[1] - X[0]
        s = self.space
        # g t <= h for every bound and inequality row, with x(t) = base + t D
        rows = [(-D, base - s.lower), (D, s.upper - base)]
        if s.A_ub.shape[0]:
            rows.append((s.A_ub @ D, s.b_ub - s.A_ub @ base))
        lo, hi = -np.inf, np.inf
        for g, h in rows:
            pos, neg = g > _SLOPE_TOL, g < -_SLOPE_TOL
            if np.any(pos):
                hi = min(hi, float(np.min(h[pos] / g[pos])))
            if np.any(neg):
                lo = max(lo, float(np.max(h[neg] / g[neg])))
        lo = max(lo, self.ranges[j, 0])
        hi = min(hi, self.ranges[j, 1])
        if lo > hi:  # x0 sits on an edge within the tolerance
            lo = hi = float(x0[j])
        return lo, hi

    def forbidden(self, X: np.ndarray) -> np.ndarray:
        return forbidden_mask(self.rules.forbidden, X)[0]

    def predict(self, name: str, X: np.ndarray):
        """(mean, sd) of one response at X, or (None, None) when it has no model.

        A limit is predicted as the screen judges it: the next measurement,
        or the true value.
        """
        model = self.result.fitted.get(name)
        if model is None or X.shape[0] == 0:
            return None, None
        rule = next((r for r in self.rules.limits if r.name == name), None)
        return model.predict(self.result.unit(X), include_noise=rule is not None and rule.with_noise)

    def joint(self, X: np.ndarray) -> np.ndarray:
        """The screen's joint figure at X (0 where a limit has no model: fail closed)."""
        return self.result.limit_figures(X)[1]


def slice_data(result: PlanResult, x0, factor: int | str, *, n: int = SLICE_POINTS) -> SliceData:
    """A one-factor slice of every model through the point x0.

    Parameters
    ----------
    result : PlanResult
        With its fitted models and design space.
    x0 : array of shape (n_factors,)
        The point, in protocol units.
    factor : int or str
        The factor that moves. A continuous factor moves over its range
        along the slice (``n`` points plus x0 itself); a discrete factor
        takes its levels. A mixture component moves against the other free
        components, which keep their proportions, so the total holds
        (components on a bound at x0 stay where they are).
    n : int

    Returns
    -------
    SliceData
        Only points inside the design space are kept.
    """
    geo = _Geometry(result)
    return _slice(geo, np.asarray(x0, dtype=float), _factor_index(result, factor), n)


def _factor_index(result: PlanResult, factor) -> int:
    if isinstance(factor, str):
        return result.space.index(factor)
    return int(factor)


def _slice(geo: _Geometry, x0: np.ndarray, j: int, n: int) -> SliceData:
    discrete = j in geo.levels
    if discrete:
        t = geo.feasible_levels(j)
    else:
        lo, hi = geo.segment(x0, j)
        t = np.unique(np.concatenate([np.linspace(lo, hi, n), [x0[j]]]))
    X = geo.move(x0, {j: t})
    keep = np.asarray(geo.space.contains(X))
    t, X = t[keep], X[keep]
    mean, sd = {}, {}
    for name in geo.protocol.response_names:
        mean[name], sd[name] = geo.predict(name, X)
    return SliceData(j, t, X, mean, sd, discrete, geo.moves_in_proportion([j]))


def map_data(result: PlanResult, x0, factors: Sequence[int | str], *, n: int = MAP_POINTS) -> MapData:
    """The joint figure and the objective's posterior mean over two factors.

    Parameters
    ----------
    result : PlanResult
    x0 : array of shape (n_factors,)
        Values of the other factors. When a mapped factor is a mixture
        component, the remaining free components are scaled in proportion
        so that the total holds.
    factors : two ints or names
    n : int
        Grid points per continuous factor (a discrete factor takes its levels).

    Returns
    -------
    MapData
    """
    geo = _Geometry(result)
    a, b = (_factor_index(result, f) for f in factors)
    return _map(geo, np.asarray(x0, dtype=float), a, b, n)


def _grid_values(geo: _Geometry, j: int, n: int) -> np.ndarray:
    if j in geo.levels:
        return geo.feasible_levels(j)
    return np.linspace(geo.ranges[j, 0], geo.ranges[j, 1], n)


def _map(geo: _Geometry, x0: np.ndarray, a: int, b: int, n: int) -> MapData:
    gx, gy = _grid_values(geo, a, n), _grid_values(geo, b, n)
    A, B = np.meshgrid(gx, gy)
    X = geo.move(x0, {a: A.ravel(), b: B.ravel()})
    inside = np.asarray(geo.space.contains(X))
    joint = np.full(X.shape[0], np.nan)
    obj = np.full(X.shape[0], np.nan)
    if np.any(inside):
        joint[inside] = geo.joint(X[inside])
        m, _ = geo.predict(geo.protocol.objective.name, X[inside])
        obj[inside] = m
    shape = A.shape
    return MapData((a, b), gx, gy, X.reshape(shape + (geo.d,)), inside.reshape(shape),
                   geo.forbidden(X).reshape(shape), joint.reshape(shape), obj.reshape(shape))


def default_map_factors(result: PlanResult) -> tuple[int, int] | None:
    """The two free factors the fitted models are most sensitive to.

    Sensitivity of a factor is the largest 1 / length scale over the fitted
    models (unit-cube coordinates, so every factor's range counts the
    same). A pair of mixture components whose sum cannot change is skipped.
    None when fewer than two factors can move.
    """
    geo = _Geometry(result)
    movable = [int(j) for j in geo.free_idx if j not in geo.levels or geo.feasible_levels(j).size > 1]
    if len(movable) < 2:
        return None
    sens = np.zeros(geo.d)
    for model in result.fitted.values():
        if model is None:
            continue
        ls = np.asarray(model.hyperparameters.length_scales, dtype=float)
        sens[geo.free_idx] = np.maximum(sens[geo.free_idx], 1.0 / ls)
    order = sorted(movable, key=lambda j: (-sens[j], j))
    for i, first in enumerate(order):
        for second in order[i + 1:]:
            if geo.can_move([first, second]):
                return first, second
    return None


def _check_map_factors(result: PlanResult, names: Sequence[str]) -> tuple[int, int]:
    geo = _Geometry(result)
    if len(names) != 2:
        raise ProtocolError(f"--map takes two factor names, got {len(names)}: {list(names)}")
    for n in names:
        if n not in result.protocol.factor_names:
            raise ProtocolError(f"--map: unknown factor {n!r}; the factors are: "
                                + ", ".join(result.protocol.factor_names))
    a, b = (result.space.index(n) for n in names)
    if a == b:
        raise ProtocolError(f"--map names {names[0]!r} twice; give two different factors")
    for j in (a, b):
        if not geo.free[j] or (j in geo.levels and geo.feasible_levels(j).size < 2):
            raise ProtocolError(
                f"--map: factor {geo.protocol.factor_names[j]!r} is fixed in this design space; "
                "choose a factor that can move")
    if not geo.can_move([a, b]):
        raise ProtocolError(
            f"--map: {names[0]!r} and {names[1]!r} are the only free mixture components, so "
            "their sum cannot change; pair one of them with another factor")
    return a, b


# ---------------------------------------------------------------- plotting
def _new_figure(width: float, height: float) -> Figure:
    # A fixed layout in inches (see _grid): the automatic layout engines
    # cost as much as drawing the figure, and a report draws dozens of axes.
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    return fig


def _grid(fig: Figure, nrows: int, ncols: int, *, left: float, right: float, top: float,
          bottom: float, wgap: float, hgap: float, **kw):
    """A grid of axes with margins and gaps given in inches, array of shape (nrows, ncols)."""
    W, H = fig.get_figwidth(), fig.get_figheight()
    pw = (W - left - right - (ncols - 1) * wgap) / ncols
    ph = (H - top - bottom - (nrows - 1) * hgap) / nrows
    gs = fig.add_gridspec(nrows, ncols, left=left / W, right=1 - right / W, top=1 - top / H,
                          bottom=bottom / H, wspace=wgap / pw, hspace=hgap / ph, **kw)
    return np.array([[fig.add_subplot(gs[r, c]) for c in range(ncols)] for r in range(nrows)])


def _legend_top(fig: Figure, handles, ncol: int) -> None:
    fig.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 1.0 - 0.04 / fig.get_figheight()),
               ncol=ncol, frameon=False, handlelength=1.8, columnspacing=1.4)


def _legend_rows(n: int, ncol: int) -> float:
    """Height in inches of a legend of n entries in ncol columns."""
    return 0.22 * (-(-n // ncol)) + 0.12


_SVG_ID = re.compile(r'(\bid="|href="#|url\(#)([^")]+)')
_PATH_DATA = re.compile(r'(\sd=")([^"]*)"')
_XY = re.compile(r'(\s[xy]=")([^"]*)"')
_NUMBER = re.compile(r"-?\d+\.\d{3,}")


def _round2(m: re.Match) -> str:
    text = f"{float(m.group(0)):.2f}".rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def _svg_inline(data: bytes, prefix: str, label: str) -> str:
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


def _finish(fig: Figure, name: str, title: str, caption: str, salt: str) -> ReportFigure:
    svg = io.BytesIO()
    png = io.BytesIO()
    with mpl.rc_context({"svg.hashsalt": f"{salt}-{name}", "svg.fonttype": "path"}):
        fig.savefig(svg, format="svg", metadata={"Date": None})
    fig.savefig(png, format="png", dpi=PNG_DPI)
    return ReportFigure(name, title, caption,
                        _svg_inline(svg.getvalue(), name, title), png.getvalue())


def _factor_label(geo: _Geometry, j: int, *, proportion: bool = False) -> str:
    f = geo.protocol.factors[j]
    text = f.name + (f" [{f.unit}]" if f.unit else "")
    if proportion and geo.moves_in_proportion([j]):
        text += "\n(others in proportion)"
    return text


def _limit_lines(ax, geo: _Geometry, name: str, *, vertical: bool = False) -> None:
    for lim in geo.protocol.limits:
        if lim.name != name:
            continue
        for v in (lim.lower, lim.upper):
            if v is None:
                continue
            if vertical:
                ax.axvline(v, color=OKABE_ITO["vermillion"], ls="--", lw=1.4)
            else:
                ax.axhline(v, color=OKABE_ITO["vermillion"], ls="--", lw=1.4)


def _runs_style():
    return (
        dict(marker="o", s=22, facecolor=OKABE_ITO["black"], edgecolor=OKABE_ITO["black"], linewidths=0.6,
             zorder=4),
        dict(marker="^", s=28, facecolor="white", edgecolor=OKABE_ITO["vermillion"], linewidths=1.3, zorder=4),
    )


def _slice_figure(geo: _Geometry, runs: RunsTable, safe: np.ndarray, prop, run_id: str,
                  salt: str) -> tuple[ReportFigure, str] | None:
    factors = [int(j) for j in geo.free_idx if geo.can_move([j])]
    if not factors:
        return None
    responses = list(geo.protocol.response_names)
    ncols = min(len(factors), SLICE_MAX_COLUMNS)
    blocks = -(-len(factors) // ncols)
    nrows = blocks * len(responses)
    left, right, wgap, hgap, ph, xlab = 1.05, 0.2, 0.14, 0.14, 1.5, 0.72
    pw = min(2.9 if ncols <= 2 else 2.3, (11.0 - left - right - (ncols - 1) * wgap) / ncols)
    W = left + right + ncols * pw + (ncols - 1) * wgap
    handles = [
        Line2D([], [], color=OKABE_ITO["blue"], lw=1.6, label="posterior mean"),
        Patch(facecolor=OKABE_ITO["sky"], alpha=0.35, label="95% band (limits: a new measurement)"),
        Line2D([], [], color=OKABE_ITO["blue"], marker="s", ls="none", label="discrete level, 95% bar"),
        Line2D([], [], color=OKABE_ITO["vermillion"], ls="--", lw=1.4, label="limit"),
        Line2D([], [], marker="o", color=OKABE_ITO["black"], ls="none", label="run that met every limit"),
        Line2D([], [], marker="^", mfc="white", mec=OKABE_ITO["vermillion"], mew=1.3, ls="none",
               label="run that missed (or lacks) a limit"),
        Line2D([], [], marker="*", ms=11, color=OKABE_ITO["purple"], mec=OKABE_ITO["black"], ls=":",
               label=f"proposal {run_id}"),
    ]
    drop = set()
    if all(j in geo.levels for j in factors):
        drop |= {0, 1}
    elif not any(j in geo.levels for j in factors):
        drop.add(2)
    if np.all(safe | runs.pending):
        drop.add(5)  # no run missed a limit
    handles = [h for k, h in enumerate(handles) if k not in drop]
    legend_ncol = max(2, min(len(handles), int(W // 2.4)))
    top = _legend_rows(len(handles), legend_ncol) + 0.1
    block_h = len(responses) * ph + (len(responses) - 1) * hgap + xlab
    fig = _new_figure(W, top + blocks * block_h)
    H = fig.get_figheight()
    axes = np.empty((nrows, ncols), dtype=object)
    for block in range(blocks):
        y_top = top + block * block_h
        sub = _grid(fig, len(responses), ncols, left=left, right=right, top=y_top,
                    bottom=H - y_top - block_h + xlab, wgap=wgap, hgap=hgap)
        axes[block * len(responses):(block + 1) * len(responses)] = sub
    measured_ok, measured_bad = _runs_style()
    used = ~runs.pending
    ylims: dict[str, list[float]] = {name: [] for name in responses}
    for k, j in enumerate(factors):
        block, c = divmod(k, ncols)
        sl = _slice(geo, prop.x, j, SLICE_POINTS)
        pos = _positions(geo, j, sl.t)
        x0 = float(_positions(geo, j, [prop.x[j]])[0])
        at = int(np.argmin(np.abs(sl.t - prop.x[j]))) if sl.t.size else None
        shift = 0.2 if sl.discrete else 0.0  # runs beside the model's bar, not on it
        for r, name in enumerate(responses):
            ax = axes[block * len(responses) + r, c]
            y = runs.Y[name]
            ok = used & np.isfinite(y)
            ax.scatter(_positions(geo, j, runs.X[ok & safe, j]) + shift, y[ok & safe], **measured_ok)
            ax.scatter(_positions(geo, j, runs.X[ok & ~safe, j]) + shift, y[ok & ~safe], **measured_bad)
            ylims[name] += list(y[ok])
            mean, sd = sl.mean[name], sl.sd[name]
            if mean is None:
                ax.text(0.5, 0.5, "no model\n(fails closed)", transform=ax.transAxes,
                        ha="center", va="center", fontsize=8.5, color="#444444")
            elif sl.discrete:
                ax.errorbar(pos, mean, yerr=Z95 * sd, fmt="s", ms=4.5, color=OKABE_ITO["blue"],
                            ecolor=OKABE_ITO["blue"], elinewidth=1.2, capsize=3, zorder=3)
            else:
                ax.fill_between(pos, mean - Z95 * sd, mean + Z95 * sd, color=OKABE_ITO["sky"],
                                alpha=0.35, lw=0, zorder=1)
                ax.plot(pos, mean, color=OKABE_ITO["blue"], lw=1.6, zorder=2)
            if mean is not None:
                ylims[name] += [float(np.min(mean - Z95 * sd)), float(np.max(mean + Z95 * sd))]
            for lim in geo.protocol.limits:
                if lim.name == name:
                    ylims[name] += [v for v in (lim.lower, lim.upper) if v is not None]
            _limit_lines(ax, geo, name)
            ax.axvline(x0, color=OKABE_ITO["black"], ls=":", lw=1.0, zorder=2)
            if mean is not None and at is not None:
                ax.plot([x0], [mean[at]], marker="*", ms=11, color=OKABE_ITO["purple"],
                        mec=OKABE_ITO["black"], mew=0.7, ls="none", zorder=5)
            ax.xaxis.set_major_locator(MaxNLocator(4 if ncols <= 3 else 3))
            ax.yaxis.set_major_locator(MaxNLocator(5))
            if sl.discrete:
                ax.set_xticks(pos)
                ax.set_xticklabels([format_cell(float(v)) for v in sl.t])
                ax.set_xlim(-0.5, pos.size - 0.5 + shift)
            if r == len(responses) - 1:
                ax.set_xlabel(_factor_label(geo, j, proportion=True))
            else:
                ax.tick_params(labelbottom=False)
            if c == 0:
                ax.set_ylabel(_response_label(geo, name))
            else:
                ax.tick_params(labelleft=False)
    for block in range(blocks):
        for r, name in enumerate(responses):
            values = np.asarray(ylims[name], dtype=float)
            values = values[np.isfinite(values)]
            if values.size == 0:
                continue
            lo, hi = float(values.min()), float(values.max())
            pad = 0.06 * (hi - lo) if hi > lo else max(abs(hi), 1.0) * 0.1
            for c in range(ncols):
                axes[block * len(responses) + r, c].set_ylim(lo - pad, hi + pad)
    for k in range(len(factors), blocks * ncols):
        block, c = divmod(k, ncols)
        for r in range(len(responses)):
            axes[block * len(responses) + r, c].set_visible(False)
    _legend_top(fig, handles, legend_ncol)
    title = f"Slices through proposal {run_id}"
    parts = ["Each column moves one factor with the others held at the proposal's values (dotted "
             "line); each row is one model. The band is the 95% interval (for a limit, of a new "
             "measurement, as the screen uses it). Runs made so far are drawn at their own value of "
             "the moved factor, whatever their other factors: they are projections, not points on "
             "the curve."]
    if geo.total is not None and any(geo.component[j] for j in factors):
        parts.append(f"A mixture component moves against the other free components, which keep their "
                     f"proportions so that the total stays {geo.total:g}: x_j = t and each other "
                     "free component is scaled by (total - fixed - t) / (their sum at the proposal), "
                     "where 'fixed' counts the components that stay. A component that sits on one of "
                     "its bounds at the proposal stays there (scaling it would leave the design space "
                     "at once); a slice ends where the next constraint binds.")
    if any(j in geo.levels for j in factors):
        parts.append("A discrete factor is shown at its levels only, equally spaced on the axis "
                     "(points with 95% bars; the runs sit just to the right of their level); levels "
                     "outside the design space are left out.")
    return _finish(fig, f"slices-{prop.rank}", title, _held_note(geo, prop.x, []), salt), " ".join(parts)


def _held_note(geo: _Geometry, x0: np.ndarray, moved: Sequence[int]) -> str:
    """Which components stay on their bound when others move (empty without a mixture)."""
    if geo.total is None:
        return ""
    names = geo.protocol.factor_names
    comps = [int(k) for k in np.flatnonzero(geo.component & geo.free) if k not in moved]
    if not comps:
        return ""
    adjusted = geo.adjusted(x0, moved)
    held = [names[k] for k in comps if k not in adjusted]
    if not held:
        return "When a component moves, every other free component is scaled in proportion."
    return (f"When a component moves, those on a bound here stay there ({', '.join(held)}) and the "
            f"others are scaled in proportion ({', '.join(names[k] for k in adjusted)}).")


def _response_label(geo: _Geometry, name: str) -> str:
    p = geo.protocol
    short = name if len(name) <= 24 else name[:22] + "..."
    if name == p.objective.name:
        return f"{short}\n(objective, {p.objective.direction[:3]}.)"
    lim = next(lim for lim in p.limits if lim.name == name)
    sides = []
    if lim.lower is not None:
        sides.append(f">= {lim.lower:g}")
    if lim.upper is not None:
        sides.append(f"<= {lim.upper:g}")
    return f"{short}\n(limit {' and '.join(sides)})"


def _positions(geo: _Geometry, j: int, values: np.ndarray) -> np.ndarray:
    """Plot coordinate of factor values: the value, or the level's index for a discrete factor."""
    values = np.asarray(values, dtype=float)
    if j in geo.levels:
        lv = geo.feasible_levels(j)
        return np.interp(values, lv, np.arange(lv.size))
    return values


def _edges(g: np.ndarray, discrete: bool) -> np.ndarray:
    if discrete:
        return np.arange(g.size + 1) - 0.5
    mid = 0.5 * (g[1:] + g[:-1])
    return np.concatenate([[g[0]], mid, [g[-1]]])


def _map_figure(geo: _Geometry, runs: RunsTable, safe: np.ndarray, result: PlanResult, x0: np.ndarray,
                x0_what: str, pair: tuple[int, int], chosen_how: str, salt: str) -> ReportFigure:
    a, b = pair
    md = _map(geo, x0, a, b, MAP_POINTS)
    p = geo.protocol
    thr = p.screen.threshold
    da, db = a in geo.levels, b in geo.levels
    cont = not (da or db)
    # two panels, each with its colour bar; margins in inches
    W, H, left, cb_gap, cb_w, cb_lab, bottom, top = 10.6, 5.0, 0.95, 0.12, 0.16, 0.8, 0.62, 0.5
    pw = (W - 0.1) / 2 - left - cb_gap - cb_w - cb_lab
    fig = _new_figure(W, H)
    axes, caxes = [], []
    for k in range(2):
        x = k * (W - 0.1) / 2 + left
        axes.append(fig.add_axes((x / W, bottom / H, pw / W, (H - bottom - top) / H)))
        caxes.append(fig.add_axes(((x + pw + cb_gap) / W, bottom / H, cb_w / W, (H - bottom - top) / H)))
    J = np.ma.masked_invalid(md.joint)
    O = np.ma.masked_invalid(md.objective)
    px, py = _positions(geo, a, md.gx), _positions(geo, b, md.gy)
    PX, PY = np.meshgrid(px, py)
    ex, ey = _edges(px, da), _edges(py, db)
    below = np.isfinite(md.joint) & (md.joint < thr)
    panels = [(axes[0], caxes[0], J, f"joint figure ({p.screen.joint})", (0.0, 1.0)),
              (axes[1], caxes[1], O, f"{p.objective.name}: posterior mean", None)]
    for ax, cax, Z, label, lim in panels:
        ax.grid(False)
        # dotted background: what the map leaves blank lies outside the design space
        ax.add_patch(Rectangle((0, 0), 1, 1, transform=ax.transAxes, facecolor="white", edgecolor="#b0b0b0",
                               hatch="....", linewidth=0, zorder=-1))
        if Z.count() == 0:
            ax.text(0.5, 0.5, "no point of this map lies in the design space", transform=ax.transAxes,
                    ha="center", va="center")
            cax.set_visible(False)
            continue
        vmin, vmax = lim if lim else (float(Z.min()), float(Z.max()))
        if vmax - vmin < 1e-12:
            vmax = vmin + 1e-12
        if cont:
            levels = np.linspace(0.0, 1.0, 11) if lim else MaxNLocator(10).tick_values(vmin, vmax)
            cs = ax.contourf(PX, PY, Z, levels=levels, cmap=MAP_CMAP, vmin=vmin, vmax=vmax)
            if np.nanmax(md.joint) >= thr > np.nanmin(md.joint):
                ax.contour(PX, PY, J, levels=[thr], colors=OKABE_ITO["black"], linewidths=2.0)
            if np.any(md.forbidden & md.inside):
                ax.contourf(PX, PY, md.forbidden.astype(float), levels=[0.5, 1.5], colors="none",
                            hatches=["xx"])
        else:
            cs = ax.pcolormesh(ex, ey, Z, cmap=MAP_CMAP, vmin=vmin, vmax=vmax, shading="flat")
            rects_below, rects_forb = [], []
            for iy in range(py.size):
                for ix in range(px.size):
                    cell = Rectangle((ex[ix], ey[iy]), ex[ix + 1] - ex[ix], ey[iy + 1] - ey[iy])
                    if below[iy, ix]:
                        rects_below.append(cell)
                    if md.forbidden[iy, ix] and md.inside[iy, ix]:
                        rects_forb.append(Rectangle(cell.get_xy(), cell.get_width(), cell.get_height()))
            if rects_below:
                ax.add_collection(PatchCollection(rects_below, facecolor="none", edgecolor="white",
                                                  hatch="///", linewidth=0.0))
            if rects_forb:
                ax.add_collection(PatchCollection(rects_forb, facecolor="none", edgecolor=OKABE_ITO["black"],
                                                  hatch="xx", linewidth=0.0))
            if da and db and Z.size <= MAP_ANNOTATE_MAX:
                for iy in range(py.size):
                    for ix in range(px.size):
                        if np.ma.is_masked(Z[iy, ix]):
                            continue
                        v = float(Z[iy, ix])
                        light = (v - vmin) / (vmax - vmin) > 0.55
                        ax.text(px[ix], py[iy] - 0.28, f"{v:.2f}" if lim else format_cell(v, digits=3),
                                ha="center", va="center", fontsize=7,
                                color="black" if light else "white")
        cb = fig.colorbar(cs, cax=cax)
        cb.set_label(label)
        if lim:
            cb.ax.axhline(thr, color=OKABE_ITO["black"], lw=2.0)
        # runs, proposals, near misses (projected onto the two factors)
        used = ~runs.pending
        ok_style, bad_style = _runs_style()
        ok_style = dict(ok_style, facecolor="white", s=30)
        ax.scatter(_positions(geo, a, runs.X[used & safe, a]), _positions(geo, b, runs.X[used & safe, b]),
                   **ok_style)
        ax.scatter(_positions(geo, a, runs.X[used & ~safe, a]), _positions(geo, b, runs.X[used & ~safe, b]),
                   **dict(bad_style, facecolor=OKABE_ITO["orange"], edgecolor="black", linewidths=0.7))
        nm = result.near_misses()
        if nm:
            xs = np.array([[d["x"][p.factor_names[a]], d["x"][p.factor_names[b]]] for d in nm])
            ax.scatter(_positions(geo, a, xs[:, 0]), _positions(geo, b, xs[:, 1]), marker="X", s=46,
                       facecolor=OKABE_ITO["vermillion"], edgecolor="white", linewidths=0.8, zorder=5)
        for prop in result.proposals:
            qx, qy = _positions(geo, a, [prop.x[a]])[0], _positions(geo, b, [prop.x[b]])[0]
            ax.plot([qx], [qy], marker="*", ms=15, color=OKABE_ITO["purple"], mec="black", mew=0.9,
                    ls="none", zorder=6)
            ax.annotate(str(prop.rank), (qx, qy), xytext=(6, 5), textcoords="offset points",
                        fontsize=8.5, fontweight="bold", color="black",
                        bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.85), zorder=7)
        ax.set_xlabel(_factor_label(geo, a))
        ax.set_ylabel(_factor_label(geo, b))
        if da:
            ax.set_xticks(px)
            ax.set_xticklabels([format_cell(float(v)) for v in md.gx])
        if db:
            ax.set_yticks(py)
            ax.set_yticklabels([format_cell(float(v)) for v in md.gy])
        ax.set_xlim(ex[0], ex[-1])
        ax.set_ylim(ey[0], ey[-1])
    handles = [
        Line2D([], [], color=OKABE_ITO["black"], lw=2.0, label=f"threshold {thr:g}")
        if cont else Patch(facecolor="#777777", edgecolor="white", hatch="///", label=f"below the threshold {thr:g}"),
        Line2D([], [], marker="o", mfc="white", mec="black", ls="none", label="run that met every limit"),
        Line2D([], [], marker="^", mfc=OKABE_ITO["orange"], mec="black", ls="none", label="run that missed (or lacks) a limit"),
        Line2D([], [], marker="*", ms=12, color=OKABE_ITO["purple"], mec="black", ls="none",
               label="proposal (rank)"),
        Line2D([], [], marker="X", ms=8, color=OKABE_ITO["vermillion"], mec="white", ls="none",
               label="near miss"),
    ]
    if np.any(md.forbidden & md.inside):
        handles.append(Patch(facecolor="white", edgecolor="black", hatch="xx", label="forbidden region"))
    reached = md.joint[np.isfinite(md.joint)] >= thr
    drop = set()
    if reached.size == 0 or reached.all() or not reached.any():
        drop.add(0)  # no threshold line or hatching is drawn
    used = ~runs.pending
    if not np.any(used & ~safe):
        drop.add(2)
    if not result.proposals:
        drop.add(3)
    if not result.near_misses():
        drop.add(4)
    handles = [h for k, h in enumerate(handles) if k not in drop]
    _legend_top(fig, handles, len(handles))
    names = p.factor_names
    moved = "; ".join(f"{names[k]} = {format_cell(float(x0[k]))}" for k in range(geo.d)
                      if k not in (a, b) and geo.free[k])
    parts = [f"The joint figure (left) and the objective's posterior mean (right) over {names[a]} and "
             f"{names[b]} ({chosen_how}); the other factors are held at {x0_what}"
             + (f" ({moved})" if moved else "") + "."]
    if geo.moves_in_proportion([a, b]):
        parts.append(f"The other free mixture components are scaled in proportion so that the total "
                     f"stays {geo.total:g}. " + _held_note(geo, x0, [a, b]))
    parts.append("Dotted areas lie outside the design space. Runs, proposals and near misses are projected "
                 "onto these two factors: their other factors may differ from the map's.")
    if reached.size and reached.all():
        parts.append(f"Every point of this map reaches the threshold {thr:g}.")
    elif reached.size and not reached.any():
        parts.append(f"No point of this map reaches the threshold {thr:g}.")
    elif cont:
        parts.append(f"The black line is the threshold {thr:g}; a candidate must reach it to survive.")
    else:
        parts.append(f"Hatched cells are below the threshold {thr:g}.")
    parts.append("The map shows the models only: the hard rules (forbidden regions, largest step from "
                 "a safe run) exclude further points; see the exclusions.")
    return _finish(fig, "map", f"Map over {names[a]} and {names[b]}", " ".join(parts), salt)


def _loo_figure(geo: _Geometry, salt: str) -> tuple[ReportFigure | None, list[dict]]:
    rows = []
    models = [(n, geo.result.fitted.get(n)) for n in geo.protocol.response_names]
    models = [(n, m) for n, m in models if m is not None and m.n_train >= 3]
    if not models:
        return None, rows
    ncols = min(3, len(models))
    nrows = -(-len(models) // ncols)
    pw, ph, left, wgap, hgap, bottom, top = 2.75, 2.5, 0.85, 0.85, 0.9, 0.55, 0.75
    fig = _new_figure(left + ncols * pw + (ncols - 1) * wgap + 0.25,
                      top + nrows * ph + (nrows - 1) * hgap + bottom)
    axes = _grid(fig, nrows, ncols, left=left, right=0.25, top=top, bottom=bottom, wgap=wgap, hgap=hgap)
    for k, (name, model) in enumerate(models):
        ax = axes.flat[k]
        loo = model.loo()
        y = np.asarray(model.y, dtype=float)
        half = Z95 * np.sqrt(np.asarray(loo.variance, dtype=float))
        inside = np.abs(loo.residual) <= half
        ax.errorbar(y[inside], loo.mean[inside], yerr=half[inside], fmt="o", ms=4.5, color=OKABE_ITO["blue"],
                    elinewidth=1.0, capsize=2.5, label="inside its 95% interval")
        ax.errorbar(y[~inside], loo.mean[~inside], yerr=half[~inside], fmt="^", ms=6, mfc="white",
                    mec=OKABE_ITO["vermillion"], color=OKABE_ITO["vermillion"], elinewidth=1.0, capsize=2.5,
                    label="outside its 95% interval")
        lo = float(min(y.min(), (loo.mean - half).min()))
        hi = float(max(y.max(), (loo.mean + half).max()))
        pad = 0.04 * (hi - lo if hi > lo else 1.0)
        ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color=OKABE_ITO["black"], ls="--", lw=1.0,
                label="predicted = measured")
        _limit_lines(ax, geo, name, vertical=True)
        share = float(np.mean(inside))
        ax.set_title(f"{name}\n{int(inside.sum())} of {y.size} inside ({100 * share:.0f}%)", loc="left")
        ax.set_xlabel("measured")
        ax.set_ylabel("predicted from the other runs")
        rows.append({"response": name, "n": int(y.size), "inside": int(inside.sum()), "share": share})
    for k in range(len(models), nrows * ncols):
        axes.flat[k].set_visible(False)
    handles = [
        Line2D([], [], marker="o", color=OKABE_ITO["blue"], ls="none", label="inside its 95% interval"),
        Line2D([], [], marker="^", mfc="white", mec=OKABE_ITO["vermillion"], ls="none",
               label="outside its 95% interval"),
        Line2D([], [], color=OKABE_ITO["black"], ls="--", label="predicted = measured"),
        Line2D([], [], color=OKABE_ITO["vermillion"], ls="--", lw=1.4, label="limit"),
    ]
    _legend_top(fig, handles, 2 if ncols == 1 else 4)
    caption = ("Leave-one-out check: each run predicted by the model fitted to all the other runs "
               "(closed form, same hyperparameters), with the 95% interval of a new measurement. "
               "About 95% of the points should fall inside their interval; far fewer means the "
               "model is overconfident and its probabilities are too optimistic.")
    return _finish(fig, "model-checks", "Model checks (leave-one-out)", caption, salt), rows


def _history_figure(geo: _Geometry, runs: RunsTable, safe: np.ndarray, result: PlanResult,
                    run_ids: list[str], salt: str) -> ReportFigure:
    p = geo.protocol
    y = runs.Y[p.objective.name]
    n = runs.n_runs
    k = np.arange(1, n + 1)
    ok = np.isfinite(y) & ~runs.pending
    maximize = p.maximize
    best = np.full(n, np.nan)
    cur = np.nan
    for i in range(n):
        if ok[i] and safe[i] and (np.isnan(cur) or (y[i] > cur if maximize else y[i] < cur)):
            cur = y[i]
        best[i] = cur
    fig = _new_figure(10.0, 4.0)
    ax = _grid(fig, 1, 1, left=0.85, right=0.2, top=0.15, bottom=0.8, wgap=0.0, hgap=0.0)[0, 0]
    ax.step(k, best, where="post", color=OKABE_ITO["black"], lw=2.0, label="best safe objective so far")
    ax.scatter(k[ok & safe], y[ok & safe], marker="o", s=30, color=OKABE_ITO["blue"], zorder=3,
               label="run that met every limit")
    ax.scatter(k[ok & ~safe], y[ok & ~safe], marker="^", s=36, facecolor="white",
               edgecolor=OKABE_ITO["vermillion"], linewidths=1.3, zorder=3, label="run that missed (or lacks) a limit")
    if result.proposals:
        kk = n + np.arange(1, len(result.proposals) + 1)
        m = np.array([q.mean for q in result.proposals])
        lo = np.array([q.lo95 for q in result.proposals])
        hi = np.array([q.hi95 for q in result.proposals])
        ax.errorbar(kk, m, yerr=[m - lo, hi - m], fmt="*", ms=10, color=OKABE_ITO["purple"],
                    mec=OKABE_ITO["black"], mew=0.6, elinewidth=1.2, capsize=3, ls="none",
                    label="proposed (predicted, 95% interval)")
        ax.axvline(n + 0.5, color="#888888", ls=":", lw=1.0)
    ticks = list(k) + [n + q.rank for q in result.proposals]
    labels = list(run_ids) + [f"#{q.rank}" for q in result.proposals]
    if len(ticks) <= 40:
        ax.set_xticks(ticks)
        ax.set_xticklabels(labels, rotation=60 if len(ticks) > 12 else 0, ha="right" if len(ticks) > 12 else "center",
                           fontsize=7.5)
    ax.set_xlabel("run, in the order of the runs file")
    ax.set_ylabel(p.objective.name + (f" [{p.objective.unit}]" if p.objective.unit else ""))
    ax.legend(loc="best", frameon=True, framealpha=0.9)
    caption = (f"Run history: every measured value of {p.objective.name} in the order of the runs file, "
               f"and the best value so far among the runs that met every limit ({p.objective.direction}). "
               "The proposals are shown to the right with their predicted value and 95% interval; "
               "they have not been made.")
    return _finish(fig, "history", "Run history", caption, salt)


# ---------------------------------------------------------------- the page
def _fmt(value, digits: int = 4) -> str:
    return format_cell(value, digits=digits)


def _prob(p, required: float | None = None) -> str:
    """Four decimals, or more when needed to show that p is below the requirement."""
    if p is None:
        return "-"
    p = float(p)
    if not np.isfinite(p):
        return "-"
    for digits in (4, 6, 9):
        text = f"{p:.{digits}f}"
        if required is None or float(text) < required or p >= required:
            return text
    return repr(p)


def _near_miss_rows(result: PlanResult, shown: Sequence[str]) -> list[dict]:
    p = result.protocol
    out = []
    groups: dict[tuple, dict] = {}
    for d in result.near_misses():
        key = (tuple(d["x"][n] for n in p.factor_names), d["reason"])
        reason = d["reason"]
        what, value, required, gap = "", "-", "-", "-"
        if reason == "limit-probability":
            for lim in p.limits:
                v = d["p"].get(lim.name)
                if v is not None and v < lim.probability:
                    what = lim.name
                    value, required = _prob(v, lim.probability), f"≥ {lim.probability:g}"
                    gap = f"-{_fmt(lim.probability - v, 3)}"
                    break
        elif reason == "joint-below-threshold":
            what = "joint figure"
            value, required = _prob(d["joint"], p.screen.threshold), f"≥ {p.screen.threshold:g}"
            gap = f"-{_fmt(p.screen.threshold - d['joint'], 3)}"
        elif reason == "step-too-large" and d["step"] is not None and p.screen.max_step is not None:
            what = "step"
            value, required = _fmt(d["step"]), f"≤ {p.screen.max_step:g}"
            gap = f"+{_fmt(d['step'] - p.screen.max_step, 3)}"
        elif reason == "forbidden-region":
            names = [r.name for r in p.screen.forbidden if r.name in d["detail"]]
            what = "forbidden region " + (names[0] if names else "")
        else:
            what = reason
        if key in groups:
            groups[key]["candidates"].append(d["candidate"])
            continue
        row = {
            "candidates": [d["candidate"]],
            "x": [_fmt(d["x"][n]) for n in shown],
            "reason": reason,
            "what": what,
            "value": value,
            "required": required,
            "gap": gap,
            "p": [_prob(d["p"].get(n)) for n in p.limit_names],
            "joint": _prob(d["joint"]),
            "detail": d["detail"],
            "origin": d["origin"],
        }
        groups[key] = row
        out.append(row)
    return out


def _proposal_rows(result: PlanResult, step_label: str) -> list[dict]:
    p = result.protocol
    rows = []
    for q in result.proposals:
        v = q.values
        rows.append({
            "rank": q.rank,
            "run_id": f"{step_label}-{q.rank:02d}",
            "x": [_fmt(float(x)) for x in q.x],
            "mean": _fmt(q.mean),
            "interval": f"{_fmt(q.lo95)} to {_fmt(q.hi95)}",
            "p": [_prob(q.p[n]) for n in p.limit_names],
            "joint": _prob(q.joint),
            "ei": _fmt(v.get("ei")), "pi": _fmt(v.get("pi")),
            "bound": _fmt(v.get("bound")), "mean_value": _fmt(v.get("mean")),
            "origin": q.origin,
        })
    return rows


_REASON_TEXT = {
    "survived": "passed every rule and reached the threshold",
    "outside-design-space": "outside the design space (bounds, mixture total, ratio limits, levels)",
    "forbidden-region": "inside a region the protocol forbids",
    "step-too-large": "too far from the nearest run that met every limit",
    "too-few-runs": "a limit has too few runs to vouch for anything (fail closed)",
    "model-not-fitted": "a limit's model could not be fitted (fail closed)",
    "limit-probability": "a limit's probability below its requirement",
    "joint-below-threshold": "joint figure below the screen threshold",
}


def _model_rows(result: PlanResult) -> tuple[list[dict], list[str]]:
    rows = []
    for m in result.models:
        cov = m.loo_coverage
        rows.append({
            "response": m.response, "role": m.role, "n_runs": m.n_runs, "status": m.status,
            "coverage": "-" if cov is None else f"{100 * cov:.0f}%",
            "rmse": _fmt(m.loo_rmse), "message": m.message,
            "widened": "-" if m.sd_factor is None else f"x{m.sd_factor:.3g}",
            "short": "-" if m.short_factor is None else f"x{m.short_factor:.3g}",
        })
    return rows, model_warnings(result.models)


def model_warnings(models) -> list[str]:
    """Plain-words warnings about the fitted models.

    Parameters
    ----------
    models : sequence of planner.step.ModelSummary

    Returns
    -------
    list of str
        One sentence per model that has no usable fit, that looks
        miscalibrated (leave-one-out coverage below COVERAGE_WARNING with at
        least COVERAGE_MIN_RUNS runs), or that rests on too few runs to judge.
    """
    warnings = []
    for m in models:
        cov = m.loo_coverage
        if m.status != "ok":
            warnings.append(f"The {m.role} {m.response!r} has no usable model ({m.status}: {m.message}); "
                            "it vouches for nothing, so the screen excludes every candidate it would judge.")
        elif looks_overconfident(cov, m.n_runs):
            warnings.append(f"The model of {m.response!r} looks miscalibrated: only {100 * cov:.0f}% of its "
                            f"{m.n_runs} measured values lie inside their leave-one-out 95% interval "
                            "(about 95% would be expected). Its intervals are too narrow and the "
                            "probabilities that rest on it are too optimistic; look at the data and the "
                            "model before using this plan.")
        elif cov is not None and m.n_runs < COVERAGE_MIN_RUNS:
            warnings.append(f"The model of {m.response!r} rests on {m.n_runs} runs, too few to judge "
                            "its calibration from the leave-one-out check.")
    return warnings


def _environment() -> Environment:
    return Environment(
        loader=FileSystemLoader(str(_TEMPLATES)),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )


def build_report(
    result: PlanResult,
    runs: RunsTable,
    *,
    step_label: str,
    record: dict | None = None,
    log_head: str | None = None,
    log_count: int | None = None,
    map_factors: Sequence[str] | None = None,
    problems: Sequence[str] = (),
) -> Report:
    """Render the report of one planning step.

    Parameters
    ----------
    result : PlanResult
        The step, with its fitted models (from :func:`planner.step.plan_step`
        or :func:`planner.workflow.rerun_record`).
    runs : RunsTable
        The runs the step used, in file order.
    step_label : str
        The step's label (names the report and its proposals' run ids).
    record : dict, optional
        The step's decision-log record (index, time, hash, file names).
    log_head, log_count : optional
        The decision log's head hash and record count, printed at the top.
    map_factors : two factor names, optional
        The map's factors; default :func:`default_map_factors`.
    problems : sequence of str
        Shown prominently at the top (e.g. the re-run differs from the record).

    Returns
    -------
    Report

    Raises
    ------
    ProtocolError
        ``map_factors`` names an unknown or fixed factor.
    """
    p = result.protocol
    geo = _Geometry(result)
    salt = hashlib.sha256(step_label.encode("utf-8")).hexdigest()[:8]
    safe = safe_runs_mask(p, runs)
    figures: list[ReportFigure] = []
    notes: list[str] = []
    with mpl.rc_context(_RC):
        slice_figs, slice_intro = [], ""
        for q in result.proposals:
            made = _slice_figure(geo, runs, safe, q, f"{step_label}-{q.rank:02d}", salt)
            if made is not None:
                slice_figs.append(made[0])
                slice_intro = made[1]
        if map_factors is not None:
            pair = _check_map_factors(result, list(map_factors))
            chosen_how = "chosen with --map"
        else:
            pair = default_map_factors(result)
            chosen_how = "the two factors the models are most sensitive to (shortest length scales)"
        map_fig = None
        if pair is not None:
            if result.proposals:
                x0, x0_what = result.proposals[0].x, "the first proposal's values"
            else:
                x0, x0_what = geo.centre.copy(), "the centre of the design space"
                for j, lv in geo.levels.items():
                    fl = geo.feasible_levels(j)
                    x0[j] = fl[np.argmin(np.abs(fl - x0[j]))]
                if not geo.space.contains(x0[None, :])[0]:
                    x0 = result.pool[int(np.argmax(geo.space.contains(result.pool)))]
                    x0_what = "a candidate inside the design space"
            map_fig = _map_figure(geo, runs, safe, result, np.asarray(x0, dtype=float), x0_what, pair,
                                  chosen_how, salt)
        else:
            notes.append("No map: fewer than two factors can move in this design space.")
        loo_fig, loo_rows = _loo_figure(geo, salt)
        history_fig = _history_figure(geo, runs, safe, result, list(runs.run_ids), salt)
    figures = [*slice_figs, *([map_fig] if map_fig else []), *([loo_fig] if loo_fig else []), history_fig]

    body = (record or {}).get("body", {})
    counts = result.counts()
    n_cand = int(result.pool.shape[0])
    count_rows = [{"rule": "survived", "count": counts["survived"], "text": _REASON_TEXT["survived"]}]
    count_rows += [{"rule": r, "count": counts[r], "text": _REASON_TEXT.get(r, r)} for r in REASONS]
    model_rows, model_warnings = _model_rows(result)
    fixed = [f"{f.name} = {_fmt(float(geo.ranges[j, 0]))}" for j, f in enumerate(p.factors) if not geo.free[j]]
    free_names = [f.name for j, f in enumerate(p.factors) if geo.free[j]]
    kind = p.study.kind
    inc = result.incumbent
    context = {
        "title": p.study.title,
        "study": p.study,
        "kind": kind,
        "step_label": step_label,
        "cautions": list(_cautions.cautions_for(kind)),
        "dose_cautions": list(_cautions.DOSE) if kind == "dose" else [],
        "problems": list(problems),
        "fingerprints": _fingerprint_rows(result, record, log_head, log_count),
        "mode": result.mode,
        "rule": p.ranking.rule if result.mode == "improve" else "joint figure (feasibility first)",
        "threshold": f"{p.screen.threshold:g}",
        "joint_method": p.screen.joint,
        "incumbent": (f"{_fmt(inc['value'])} (run {inc['run_id']})" if inc else
                      "none: no run so far meets every limit"),
        "n_runs_used": result.n_runs_used,
        "n_pending": result.n_pending,
        "messages": list(result.messages),
        "flags": list(result.flags),
        "factor_names": list(p.factor_names),
        "factor_units": [f.unit for f in p.factors],
        "limit_names": list(p.limit_names),
        "limits": [{"text": lim.describe(), "probability": f"{lim.probability:g}", "source": lim.source}
                   for lim in p.limits],
        "objective": p.objective,
        "proposals": _proposal_rows(result, step_label),
        "n_requested": body.get("count_requested") or p.batch.size,
        "slice_figures": slice_figs,
        "slice_intro": slice_intro,
        "map_figure": map_fig,
        "loo_figure": loo_fig,
        "loo_rows": loo_rows,
        "history_figure": history_fig,
        "notes": notes,
        "counts": count_rows,
        "n_candidates": n_cand,
        "near_misses": _near_miss_rows(result, free_names),
        "free_names": free_names,
        "models": model_rows,
        "model_warnings": model_warnings,
        "fixed": fixed,
        "runs": _run_rows(p, runs, safe),
        "version": __version__,
    }
    html = _environment().get_template("report.html.j2").render(**context)
    return Report(step_label=step_label, html=html, figures=tuple(figures), problems=tuple(problems))


def _fingerprint_rows(result: PlanResult, record, log_head, log_count) -> list[tuple[str, str]]:
    body = (record or {}).get("body", {})
    rows = [("protocol fingerprint", result.protocol.fingerprint)]
    pf, rf = body.get("protocol_file"), body.get("runs_file")
    if pf:
        rows.append(("protocol file", f"{pf['name']} (sha256 {pf['sha256']})"))
    rows.append(("runs file", (f"{rf['name']} " if rf else "") + f"(sha256 {result.runs_sha256})"))
    recorded_version = body.get("tool_version")
    if recorded_version and recorded_version != __version__:
        rows.append(("tool version", f"{recorded_version} (recorded); this page made with {__version__}"))
    else:
        rows.append(("tool version", __version__))
    rows.append(("seed", str(result.seed) + (" (drawn at random and recorded)" if body.get("seed_drawn") else "")))
    if record:
        rows.append(("decision record", f"index {record['index']}, {record['time']}, hash {record['hash']}"))
        if body.get("plan_table"):
            rows.append(("plan table", f"{body['plan_table']['file']} (sha256 {body['plan_table']['sha256']})"))
    if log_head is not None:
        rows.append(("decision log", f"head {log_head}, {log_count} record{'s' * (log_count != 1)} "
                                     "(check with guardband verify --expect-head ... --expect-count ...)"))
    return rows


def _run_status(protocol, runs: RunsTable, i: int) -> str:
    if runs.pending[i]:
        return "pending (not measured)"
    missed, unmeasured = [], []
    for lim in protocol.limits:
        v = runs.Y[lim.name][i]
        if not np.isfinite(v):
            unmeasured.append(lim.name)
        elif (lim.upper is not None and v > lim.upper) or (lim.lower is not None and v < lim.lower):
            missed.append(lim.name)
    parts = []
    if missed:
        parts.append("missed " + ", ".join(missed))
    if unmeasured:
        parts.append("not measured: " + ", ".join(unmeasured))
    return "; ".join(parts) or "met every limit"


def _run_rows(protocol, runs: RunsTable, safe: np.ndarray) -> dict:
    names = list(protocol.response_names)
    rows = []
    for i, rid in enumerate(runs.run_ids):
        rows.append({
            "run_id": rid,
            "x": [_fmt(float(v)) for v in runs.X[i]],
            "y": [_fmt(float(runs.Y[n][i])) if np.isfinite(runs.Y[n][i]) else "-" for n in names],
            "status": _run_status(protocol, runs, i),
        })
    return {"responses": names, "rows": rows}


# ------------------------------------------------------------------ writing
def write_report(report: Report, folder: str | Path, *, record_index: int | None = None) -> ReportFiles:
    """Write ``report-<label>.html`` and ``figures-<label>/*.png`` into ``folder``.

    Each file is written atomically.

    Raises
    ------
    OutputError
        A file could not be written.
    """
    folder = Path(folder)
    fig_dir = folder / f"figures-{report.step_label}"
    try:
        fig_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        from guardband.planner.errors import OutputError

        raise OutputError(f"could not create {fig_dir}: {exc.strerror or exc}") from exc
    paths = []
    for fig in report.figures:
        path = fig_dir / f"{fig.name}.png"
        atomic_write_bytes(path, fig.png)
        paths.append(path)
    html_path = folder / f"report-{report.step_label}.html"
    atomic_write_text(html_path, report.html)
    return ReportFiles(report.step_label, record_index, html_path, tuple(paths), report.problems)


def _supersession(records: list[dict]) -> dict[int, str]:
    """Record index -> a sentence naming the later record that supersedes it."""
    out = {}
    by_index = {r["index"]: r for r in records}
    for rec in ledger.effective_records(records):
        later = rec.get("superseded_by")
        if later is not None:
            reason = by_index[later]["body"].get("reason", "")
            out[rec["index"]] = (f"This planning step was superseded by record {later} "
                                 f"({by_index[later]['kind']}): {reason}")
    return out


def _recorded_runs(folder: Path, body: dict, protocol) -> RunsTable:
    """The runs of a plan record, read from its input copy as the plan read them."""
    options = body["runs_file"].get("read_options") or {}
    return read_runs(folder / body["runs_file"]["copy"], protocol, **options)


def report_folder(folder: str | Path, *, map_factors: Sequence[str] | None = None) -> list[ReportFiles]:
    """Write a report for every planning step recorded in ``folder/decisions.jsonl``.

    Each step is re-run from its recorded inputs
    (:func:`planner.workflow.rerun_record`) to rebuild its models; the
    re-run's plan table must hash to the recorded one. When it does not,
    the report says so at the top and ``problems`` names it.

    Raises
    ------
    VerificationError
        The log is missing, fails verification, holds no plan record, or an
        input copy is missing or altered.
    """
    from guardband.planner.app.workflow import LOG_NAME, compare_with_record, rerun_record

    folder = Path(folder)
    log = folder / LOG_NAME
    if not log.is_file():
        raise VerificationError(f"{folder}: there is no decision log {LOG_NAME} here; "
                                "run `guardband plan ... --out` into this folder first")
    ledger.verify_or_raise(log)
    records = ledger.read_records(log)
    plans = [r for r in records if r["kind"] == "plan"]
    if not plans:
        raise VerificationError(f"{log}: the log holds no plan record, so there is nothing to report")
    if map_factors is not None:  # refuse a bad --map before the (slow) re-runs
        from guardband.planner.inputs.protocol import load_protocol

        for rec in plans:
            pf = rec["body"]["protocol_file"]
            copy = folder / pf["copy"]
            if not copy.is_file() or hashlib.sha256(copy.read_bytes()).hexdigest() != pf["sha256"]:
                continue  # rerun_record names the missing or altered copy
            names = load_protocol(copy).factor_names
            for n in map_factors:
                if n not in names:
                    raise ProtocolError(f"--map: unknown factor {n!r}; the factors are: " + ", ".join(names))
    head, count = ledger.head_and_count(log)
    superseded = _supersession(records)
    out = []
    for rec in plans:
        result, rec = rerun_record(log, rec["index"])
        body = rec["body"]
        problems = []
        replay = compare_with_record(result, rec)
        sha = replay.replayed_sha256
        step_label = body.get("step_label", replay.step_label)
        if sha != replay.recorded_sha256:
            problems.append(
                f"Re-running record {rec['index']} from its recorded inputs gave a different plan table "
                f"(sha256 {sha[:12]}... instead of the recorded {body['plan_table']['sha256'][:12]}...). "
                "This page shows the re-run, not the recorded plan; compare with "
                f"{body['plan_table']['file']} and the decision log before using it.")
        if body.get("tool_version") != __version__:
            problems.append(f"Recorded with tool version {body.get('tool_version')}; this page was made "
                            f"with {__version__}.")
        if rec["index"] in superseded:
            problems.append(superseded[rec["index"]])
        runs = _recorded_runs(folder, body, result.protocol)
        report = build_report(result, runs, step_label=step_label, record=rec, log_head=head,
                              log_count=count, map_factors=map_factors, problems=problems)
        out.append(write_report(report, folder, record_index=rec["index"]))
    return out


def report_plan(outcome, *, map_factors: Sequence[str] | None = None) -> ReportFiles:
    """Write the report of a planning step just made by :func:`planner.workflow.run_plan`.

    Parameters
    ----------
    outcome : planner.workflow.PlanOutcome
    map_factors : two factor names, optional
    """
    body = outcome.record["body"]
    folder = outcome.log_path.parent
    runs = _recorded_runs(folder, body, outcome.result.protocol)
    report = build_report(outcome.result, runs, step_label=body["step_label"], record=outcome.record,
                          log_head=outcome.head, log_count=outcome.count, map_factors=map_factors)
    return write_report(report, folder, record_index=outcome.record["index"])
