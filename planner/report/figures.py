"""The report's figures: slices through each proposal, the map, the model checks, the run history.

Each function draws one figure from a :class:`~guardband.planner.report.data._Geometry`
and returns it as a :class:`~guardband.planner.report.style.ReportFigure`.
Runs made so far are drawn where they lie on the moved factors, whatever
their other factors: they are projections.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from matplotlib.collections import PatchCollection
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Rectangle
from matplotlib.ticker import MaxNLocator

from guardband.planner.app.textable import format_cell
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.models.checks import loo_interval
from guardband.planner.settings import Z95
from guardband.planner.simulation.loop import best_so_far
from guardband.planner.step import PlanResult

from guardband.planner.report.tables import band_label
from guardband.planner.report.data import (MAP_POINTS, SLICE_POINTS, JudgedRecipe, MapData, SliceData, _Geometry,
                                           map_at, slice_at)
from guardband.planner.report.style import (
    LIMIT_LINE, MAP_CMAP, OKABE_ITO, RUN_MET, RUN_MISSED, ReportFigure, axes_grid, finish_figure, legend_rows,
    legend_top, limit_handle, new_figure, runs_style,
)

__all__ = ["slice_figure", "draw_slices", "map_figure", "loo_figure", "history_figure"]

#: Cells of an all-discrete map that get their value written in.
MAP_ANNOTATE_MAX = 80


# ---------------------------------------------------------------- shared parts
def _with_unit(name: str, unit: str | None) -> str:
    return name + (f" [{unit}]" if unit else "")


def _factor_label(geo: _Geometry, j: int, *, proportion: bool = False) -> str:
    f = geo.protocol.factors[j]
    text = _with_unit(f.name, f.unit)
    if proportion and geo.moves_in_proportion([j]):
        text += "\n(others in proportion)"
    return text


def _limit_values(geo: _Geometry, name: str) -> list[float]:
    """The bounds of the limit on response ``name`` (none for the objective)."""
    lim = geo.limit_rule(name)
    if lim is None:
        return []
    return [v for v in (lim.lower, lim.upper) if v is not None]


def _limit_lines(ax, geo: _Geometry, name: str, *, vertical: bool = False) -> None:
    for v in _limit_values(geo, name):
        if vertical:
            ax.axvline(v, **LIMIT_LINE)
        else:
            ax.axhline(v, **LIMIT_LINE)


def _positions(geo: _Geometry, j: int, values: np.ndarray) -> np.ndarray:
    """Plot coordinate of factor values: the value, or the level's index for a discrete factor."""
    values = np.asarray(values, dtype=float)
    if j in geo.levels:
        lv = geo.feasible_levels(j)
        return np.interp(values, lv, np.arange(lv.size))
    return values


def _level_ticks(axis, positions: np.ndarray, values: np.ndarray) -> None:
    """Ticks of a discrete factor: one at each level's position, labelled with its value."""
    axis.set_ticks(positions)
    axis.set_ticklabels([format_cell(float(v)) for v in values])


def _edges(g: np.ndarray, discrete: bool) -> np.ndarray:
    if discrete:
        return np.arange(g.size + 1) - 0.5
    mid = 0.5 * (g[1:] + g[:-1])
    return np.concatenate([[g[0]], mid, [g[-1]]])


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


# ---------------------------------------------------------------- slices
#: Factor cards side by side before the figure wraps to a new row of cards.
SLICE_CARD_COLUMNS = 3
#: How far right of its level a run is drawn on a discrete slice (beside the model's bar, not on it).
_RUNS_SHIFT = 0.2
#: Shade of the side of a limit that breaks it.
_BEYOND_LIMIT = dict(color=OKABE_ITO["vermillion"], alpha=0.09, lw=0, zorder=0)
#: A band reaching further than this many spans of the runs, limits and mean past them is cut at the strip's edge.
_BAND_REACH = 1.0
#: Share of a strip's height kept free at the top for its label.
_LABEL_ROOM = 0.3


def slice_figure(geo: _Geometry, runs: RunsTable, safe: np.ndarray, prop, run_id: str,
                 salt: str, judged: Sequence[JudgedRecipe] = ()) -> tuple[ReportFigure, str] | None:
    """One-factor slices of every model through one proposal, and the text that introduces them.

    One card per factor that can move; in each card the responses are
    stacked strips sharing the factor's axis, and the proposal is a marker
    on each curve with its predicted value.

    Parameters
    ----------
    geo : _Geometry
    runs : RunsTable
    safe : bool array of shape (n_runs,)
        Which runs met every limit.
    prop : the proposal (its ``x`` and ``rank``)
    run_id : str
        The proposal's run id, for the legend.
    salt : str
        Makes the SVG ids of this report its own.
    judged : sequence of JudgedRecipe
        Recipes judged with these models, drawn where they lie on each
        factor at their predicted value (projections, as the runs are).

    Returns
    -------
    (ReportFigure, str) or None
        None when no factor can move.
    """
    drawn = draw_slices(geo, runs, safe, prop, run_id, judged)
    if drawn is None:
        return None
    fig, cards = drawn
    factors = list(cards)
    title = f"Slices through proposal {run_id}"
    note = _held_note(geo, prop.x, [])
    if judged:
        note = (note + " " if note else "") + _judged_note(judged)
    figure = finish_figure(fig, f"slices-{prop.rank}", title, note, salt)
    return figure, _slice_intro(geo, factors)


def draw_slices(geo: _Geometry, runs: RunsTable, safe: np.ndarray, prop, run_id: str,
                judged: Sequence[JudgedRecipe] = ()):
    """The slice figure (a matplotlib Figure) and its cards, or None when no factor can move.

    The cards map each moved factor to its strips: one axes per response,
    in the protocol's order (objective first), sharing the factor's axis.
    """
    factors = [int(j) for j in geo.free_idx if geo.can_move([j])]
    if not factors:
        return None
    responses = list(geo.protocol.response_names)
    most = len(_slice_handles(geo, factors, runs, safe, run_id, cut=True, judged=judged))
    fig, cards, legend_ncol = _slice_cards(geo, factors, len(responses), most)
    ranges: dict[str, tuple[list[float], list[float]]] = {name: ([], []) for name in responses}
    bands = {}
    for j, strips in cards.items():
        sl = slice_at(geo, prop.x, j, SLICE_POINTS)
        for r, (ax, name) in enumerate(zip(strips, responses)):
            core, bands[ax] = _slice_strip(ax, geo, runs, safe, sl, name, prop.x[j])
            core += _judged_on_strip(ax, geo, judged, j, name, sl.discrete)
            ranges[name][0].extend(core)
            if bands[ax] is not None:
                ranges[name][1].extend([float(np.min(bands[ax][1])), float(np.max(bands[ax][2]))])
            _strip_axes(ax, geo, sl, j, last=r == len(responses) - 1)
        _proposal_caret(strips[-1], float(_positions(geo, j, [prop.x[j]])[0]))
    cut = False
    for r, name in enumerate(responses):
        lo, hi = _strip_range(*ranges[name])
        for strips in cards.values():
            cut = _finish_strip(strips[r], geo, name, lo, hi, bands[strips[r]]) or cut
    legend_top(fig, _slice_handles(geo, factors, runs, safe, run_id, cut=cut, judged=judged), legend_ncol)
    return fig, cards


def _slice_handles(geo: _Geometry, factors: Sequence[int], runs: RunsTable, safe: np.ndarray,
                   run_id: str, *, cut: bool, judged: Sequence[JudgedRecipe] = ()) -> list:
    """The legend entries a slice figure needs (``cut``: some band goes on past a strip's edge)."""
    discrete = [j in geo.levels for j in factors]
    entries = [
        (Line2D([], [], color=OKABE_ITO["blue"], lw=1.6, label="posterior mean"), not all(discrete)),
        (Patch(facecolor=OKABE_ITO["sky"], alpha=0.35, label=band_label(geo.result)),
         not all(discrete)),
        (Line2D([], [], marker="^", color=OKABE_ITO["sky"], mec=OKABE_ITO["blue"], ls="none",
                label="band goes on past the edge"), cut),
        (Line2D([], [], color=OKABE_ITO["blue"], marker="s", ls="none", label="discrete level, 95% bar"),
         any(discrete)),
        (limit_handle(), bool(geo.protocol.limits)),
        (Patch(**{k: v for k, v in _BEYOND_LIMIT.items() if k != "zorder"}, label="beyond the limit"),
         bool(geo.protocol.limits)),
        (Line2D([], [], marker="o", color=OKABE_ITO["black"], ls="none", label=RUN_MET), True),
        (Line2D([], [], marker="^", mfc="white", mec=OKABE_ITO["vermillion"], mew=1.3, ls="none",
                label=RUN_MISSED), not np.all(safe | runs.pending)),
        (Line2D([], [], marker="*", ms=11, color=OKABE_ITO["purple"], mec=OKABE_ITO["black"], ls="none",
                label=f"proposal {run_id} (predicted value)"), True),
        *[(h, True) for h in _judged_handles(judged, " (predicted value)")],
    ]
    return [h for h, shown in entries if shown]


def _slice_cards(geo: _Geometry, factors: Sequence[int], n_responses: int, n_handles: int):
    """The figure, one card of stacked strips per factor, and the legend's number of columns.

    Returns ``(fig, cards, legend_ncol)`` where ``cards`` maps a factor to
    its strips, top to bottom. Sizes are in inches.
    """
    ncols = min(len(factors), SLICE_CARD_COLUMNS)
    rows = -(-len(factors) // ncols)
    yaxis, card_w, card_gap, side = 0.62, 3.05, 0.3, 0.15
    strip_h = 1.0 if n_responses <= 3 else 0.82
    strip_gap, head, foot, row_gap = 0.05, 0.38, 0.55, 0.2
    W = 2 * side + ncols * (yaxis + card_w) + (ncols - 1) * card_gap
    legend_ncol = max(2, min(n_handles, int(W // 2.5)))
    top = legend_rows(n_handles, legend_ncol) + 0.05
    card_h = head + n_responses * strip_h + (n_responses - 1) * strip_gap + foot
    fig = new_figure(W, top + rows * card_h + (rows - 1) * row_gap)
    H = fig.get_figheight()
    cards = {}
    for k, j in enumerate(factors):
        row, col = divmod(k, ncols)
        x = side + col * (yaxis + card_w + card_gap) + yaxis
        y_top = top + row * (card_h + row_gap) + head
        strips = []
        for r in range(n_responses):
            y = y_top + r * (strip_h + strip_gap)
            ax = fig.add_axes((x / W, 1 - (y + strip_h) / H, card_w / W, strip_h / H),
                              sharex=strips[0] if strips else None)
            ax.set_facecolor("none")  # an arrow on a strip's edge stays visible over its neighbour
            strips.append(ax)
        strips[0].set_title(_factor_label(geo, j), loc="left", fontweight="bold", pad=6)
        if geo.moves_in_proportion([j]):
            strips[-1].set_xlabel("the other free components in proportion", fontsize=7.5, color="#555555",
                                  labelpad=2)
        cards[j] = strips
    return fig, cards, legend_ncol


def _slice_strip(ax, geo: _Geometry, runs: RunsTable, safe: np.ndarray, sl: SliceData, name: str,
                 x0: float) -> tuple[list[float], tuple | None]:
    """Draw one model along one slice through x0.

    Returns the values the strip must show (runs, limits, mean) and the
    band as (positions, lower, upper), or None without a model; the strip
    shows the band as far as it stays near those values.
    """
    j = sl.factor
    pos = _positions(geo, j, sl.t)
    at = float(_positions(geo, j, [x0])[0])
    shift = _RUNS_SHIFT if sl.discrete else 0.0
    y = runs.Y[name]
    ok = ~runs.pending & np.isfinite(y)
    measured_ok, measured_bad = runs_style()
    ax.scatter(_positions(geo, j, runs.X[ok & safe, j]) + shift, y[ok & safe], **dict(measured_ok, s=16))
    ax.scatter(_positions(geo, j, runs.X[ok & ~safe, j]) + shift, y[ok & ~safe], **dict(measured_bad, s=22))
    core = list(y[ok]) + _limit_values(geo, name)
    if sl.mean[name] is None or not sl.t.size:
        ax.text(0.5, 0.5, "no model (fails closed)", transform=ax.transAxes,
                ha="center", va="center", fontsize=8, color="#444444")
        return core, None
    # the centre and 95% interval in the response's own units (a binomial rate: its median
    # and interval, inside [0, 1])
    mean, lo, hi = sl.band(name)
    if sl.discrete:
        ax.errorbar(pos, mean, yerr=np.vstack([mean - lo, hi - mean]), fmt="s", ms=4, color=OKABE_ITO["blue"],
                    ecolor=OKABE_ITO["blue"], elinewidth=1.1, capsize=2.5, zorder=3)
    else:
        ax.fill_between(pos, lo, hi, color=OKABE_ITO["sky"], alpha=0.35, lw=0, zorder=1)
        ax.plot(pos, mean, color=OKABE_ITO["blue"], lw=1.6, zorder=2)
    core += [float(np.min(mean)), float(np.max(mean))]
    band = (pos, lo, hi)
    k = int(np.argmin(np.abs(sl.t - x0)))
    ax.plot([at], [mean[k]], marker="*", ms=11, color=OKABE_ITO["purple"], mec=OKABE_ITO["black"],
            mew=0.7, ls="none", zorder=6)
    ax.annotate(format_cell(float(mean[k]), digits=3), (at, mean[k]), xytext=(7, 5),
                textcoords="offset points", fontsize=7.5, color=OKABE_ITO["black"], zorder=7,
                bbox=dict(boxstyle="round,pad=0.12", fc="white", ec="none", alpha=0.8))
    return core, band


def _strip_axes(ax, geo: _Geometry, sl: SliceData, j: int, *, last: bool) -> None:
    """Ticks of one strip: the factor's values under the last strip of a card only."""
    ax.yaxis.set_major_locator(MaxNLocator(3))
    ax.tick_params(axis="y", labelsize=7.5)
    ax.xaxis.set_major_locator(MaxNLocator(5))
    if sl.discrete:
        pos = _positions(geo, j, sl.t)
        _level_ticks(ax.xaxis, pos, sl.t)
        ax.set_xlim(-0.5, pos.size - 0.5 + _RUNS_SHIFT)
    if not last:
        ax.tick_params(labelbottom=False)
    ax.spines["bottom"].set_visible(last)


def _proposal_caret(ax, at: float) -> None:
    """A caret under the card at the proposal's setting, on the factor's axis."""
    ax.plot([at], [0.0], marker="^", ms=7, color=OKABE_ITO["purple"], mec=OKABE_ITO["black"], mew=0.6,
            ls="none", transform=ax.get_xaxis_transform(), clip_on=False, zorder=8)


def _strip_range(core: Sequence[float], band: Sequence[float]) -> tuple[float, float]:
    """One y range for a response's strips: every run, limit and mean, the band as far as it stays near.

    The top keeps room for the strip's label.
    """
    core = np.asarray([v for v in core if np.isfinite(v)], dtype=float)
    band = np.asarray([v for v in band if np.isfinite(v)], dtype=float)
    if core.size == 0 and band.size == 0:
        return 0.0, 1.0
    if core.size == 0:
        core = band
    lo, hi = float(core.min()), float(core.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0) * 0.1
    reach_lo, reach_hi = lo - _BAND_REACH * span, hi + _BAND_REACH * span
    if band.size:
        lo = min(lo, max(float(band.min()), reach_lo))
        hi = max(hi, min(float(band.max()), reach_hi))
    pad = 0.07 * (hi - lo) if hi > lo else max(abs(hi), 1.0) * 0.1
    return lo - pad, hi + pad + _LABEL_ROOM * (hi - lo + 2 * pad)


def _finish_strip(ax, geo: _Geometry, name: str, lo: float, hi: float, band: tuple | None) -> bool:
    """The strip's y range, its limit lines with the side beyond them shaded, its label, and a cut band's arrows."""
    ax.set_ylim(lo, hi)
    lim = geo.limit_rule(name)
    if lim is not None:
        if lim.upper is not None and lim.upper < hi:
            ax.axhspan(lim.upper, hi, **_BEYOND_LIMIT)
        if lim.lower is not None and lim.lower > lo:
            ax.axhspan(lo, lim.lower, **_BEYOND_LIMIT)
    _limit_lines(ax, geo, name)
    ax.text(0.012, 0.94, _strip_label(geo, name), transform=ax.transAxes, ha="left", va="top", fontsize=7.5,
            zorder=9, bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="#c8c8c8", lw=0.5, alpha=0.85))
    return band is not None and _band_cut_arrows(ax, *band, lo, hi)


def _band_cut_arrows(ax, pos: np.ndarray, lower: np.ndarray, upper: np.ndarray, lo: float, hi: float) -> bool:
    """An arrow at the strip's edge where its band reaches furthest past it; True if there is one."""
    cut = False
    for values, edge, marker, beyond in ((upper, 1.0, "^", upper > hi), (lower, 0.0, "v", lower < lo)):
        if np.any(beyond):
            cut = True
            k = int(np.argmax(values)) if edge == 1.0 else int(np.argmin(values))
            ax.plot([pos[k]], [edge], marker=marker, ms=6, color=OKABE_ITO["sky"], mec=OKABE_ITO["blue"],
                    mew=0.8, ls="none", transform=ax.get_xaxis_transform(), clip_on=False, zorder=9)
    return cut


def _strip_label(geo: _Geometry, name: str) -> str:
    """A response's name, unit and role, written inside its strip."""
    p = geo.protocol
    short = name if len(name) <= 24 else name[:22] + "..."
    if name == p.objective.name:
        better = "higher" if p.maximize else "lower"
        return f"{_with_unit(short, p.objective.unit)} · objective, {better} is better"
    lim = geo.limit_rule(name)
    unit = next((x.unit for x in p.limits if x.name == name), "")
    sides = []
    if lim.lower is not None:
        sides.append(f">= {lim.lower:g}")
    if lim.upper is not None:
        sides.append(f"<= {lim.upper:g}")
    return f"{_with_unit(short, unit)} · limit {' and '.join(sides)}"


def _slice_intro(geo: _Geometry, factors: Sequence[int]) -> str:
    parts = ["Each card moves one factor with the others held at the proposal's values; its strips are the "
             "models, one per response, on the same axis. The star on each curve is the proposal, with its "
             "predicted value, and the caret under the card marks its setting. The band is the 95% "
             "interval (for a limit, of a new measurement, as the screen uses it); the shaded side of a "
             "limit line breaks the limit. A band that reaches far past the runs, the limits and the mean "
             "is cut at the strip's edge, with an arrow where it reaches furthest. A response's strips share one scale "
             "across the cards. Runs made so far are drawn at their own value of the moved factor, "
             "whatever their other factors: they are projections, not points on the curve."]
    rates = [item.name for item in geo.protocol.binomial_responses]
    if rates:
        parts.append(f"A rate of events among subjects ({', '.join(rates)}) is shown as the median and 95% "
                     "interval of its true rate (a Gaussian process on the logit of the rate), so it "
                     "stays between 0 and 1; the runs are their measured events / subjects.")
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
    return " ".join(parts)


# ---------------------------------------------------------------- map
def map_figure(geo: _Geometry, runs: RunsTable, safe: np.ndarray, result: PlanResult, x0: np.ndarray,
               x0_what: str, pair: tuple[int, int], chosen_how: str, salt: str,
               judged: Sequence[JudgedRecipe] = ()) -> ReportFigure:
    """The joint figure (left) and the objective's posterior mean (right) over two factors.

    Parameters
    ----------
    x0 : array of shape (n_factors,)
        Values of the other factors; ``x0_what`` says what they are.
    pair : (int, int)
        The x and y factors; ``chosen_how`` says why these two.
    judged : sequence of JudgedRecipe
        Recipes judged with these models, projected as the runs are.
    """
    a, b = pair
    md = map_at(geo, x0, a, b, MAP_POINTS)
    p = geo.protocol
    thr = p.screen.threshold
    da, db = a in geo.levels, b in geo.levels
    cont = not (da or db)
    n_handles = len(_map_handles(md, runs, safe, result, thr, cont, np.zeros(0, bool))) + 1 + len(
        _judged_handles(judged, ""))  # at most: the threshold entry may be left out
    fig, axes, caxes = _map_axes(extra_top=0.0 if n_handles <= _MAP_LEGEND_ONE_ROW else legend_rows(2, 1) - 0.34)
    px, py = _positions(geo, a, md.gx), _positions(geo, b, md.gy)
    ex, ey = _edges(px, da), _edges(py, db)
    panels = [(axes[0], caxes[0], np.ma.masked_invalid(md.joint), f"joint figure ({p.screen.joint})", (0.0, 1.0)),
              (axes[1], caxes[1], np.ma.masked_invalid(md.objective), f"{p.objective.name}: posterior mean", None)]
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
            cs = _map_contours(ax, md, px, py, Z, vmin, vmax, thr, probability=lim is not None)
        else:
            cs = _map_cells(ax, md, px, py, ex, ey, Z, vmin, vmax, thr, annotate=da and db,
                            probability=lim is not None)
        cb = fig.colorbar(cs, cax=cax)
        cb.set_label(label)
        if lim:
            cb.ax.axhline(thr, color=OKABE_ITO["black"], lw=2.0)
        _map_markers(ax, geo, runs, safe, result, a, b)
        ax.set_xlabel(_factor_label(geo, a))
        ax.set_ylabel(_factor_label(geo, b))
        if da:
            _level_ticks(ax.xaxis, px, md.gx)
        if db:
            _level_ticks(ax.yaxis, py, md.gy)
        ax.set_xlim(ex[0], ex[-1])
        ax.set_ylim(ey[0], ey[-1])
        _judged_on_map(ax, geo, judged, a, b)  # after the limits: a name near the right edge goes left
    reached = md.joint[np.isfinite(md.joint)] >= thr
    handles = _map_handles(md, runs, safe, result, thr, cont, reached) + _judged_handles(judged, "")
    legend_top(fig, handles, len(handles) if n_handles <= _MAP_LEGEND_ONE_ROW else -(-len(handles) // 2))
    names = p.factor_names
    caption = _map_caption(geo, x0, x0_what, pair, chosen_how, cont, reached)
    if judged:
        caption += " " + _judged_note(judged)
    return finish_figure(fig, "map", f"Map over {names[a]} and {names[b]}", caption, salt)


#: Legend entries of the map that fit in one row above its panels; more take two rows.
_MAP_LEGEND_ONE_ROW = 6


def _map_axes(extra_top: float = 0.0):
    """The map figure, its two panels and their colour bars (margins in inches; ``extra_top``: room
    for a second legend row)."""
    W, H, left, cb_gap, cb_w, cb_lab, bottom, top = 10.6, 5.0 + extra_top, 0.95, 0.12, 0.16, 0.8, 0.62, 0.5
    top += extra_top
    pw = (W - 0.1) / 2 - left - cb_gap - cb_w - cb_lab
    fig = new_figure(W, H)
    axes, caxes = [], []
    for k in range(2):
        x = k * (W - 0.1) / 2 + left
        axes.append(fig.add_axes((x / W, bottom / H, pw / W, (H - bottom - top) / H)))
        caxes.append(fig.add_axes(((x + pw + cb_gap) / W, bottom / H, cb_w / W, (H - bottom - top) / H)))
    return fig, axes, caxes


def _map_contours(ax, md: MapData, px, py, Z, vmin: float, vmax: float, thr: float, *, probability: bool):
    """Filled contours of Z over two continuous factors, the threshold line and forbidden hatching."""
    PX, PY = np.meshgrid(px, py)
    levels = np.linspace(0.0, 1.0, 11) if probability else MaxNLocator(10).tick_values(vmin, vmax)
    cs = ax.contourf(PX, PY, Z, levels=levels, cmap=MAP_CMAP, vmin=vmin, vmax=vmax)
    if np.nanmax(md.joint) >= thr > np.nanmin(md.joint):
        ax.contour(PX, PY, np.ma.masked_invalid(md.joint), levels=[thr], colors=OKABE_ITO["black"],
                   linewidths=2.0)
    if np.any(md.forbidden & md.inside):
        ax.contourf(PX, PY, md.forbidden.astype(float), levels=[0.5, 1.5], colors="none", hatches=["xx"])
    return cs


def _map_cells(ax, md: MapData, px, py, ex, ey, Z, vmin: float, vmax: float, thr: float, *, annotate: bool,
               probability: bool):
    """One cell per grid point when a factor is discrete; cells below the threshold and forbidden ones hatched."""
    cs = ax.pcolormesh(ex, ey, Z, cmap=MAP_CMAP, vmin=vmin, vmax=vmax, shading="flat")
    below = np.isfinite(md.joint) & (md.joint < thr)
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
    if annotate and Z.size <= MAP_ANNOTATE_MAX:
        for iy in range(py.size):
            for ix in range(px.size):
                if np.ma.is_masked(Z[iy, ix]):
                    continue
                v = float(Z[iy, ix])
                light = (v - vmin) / (vmax - vmin) > 0.55
                ax.text(px[ix], py[iy] - 0.28, f"{v:.2f}" if probability else format_cell(v, digits=3),
                        ha="center", va="center", fontsize=7, color="black" if light else "white")
    return cs


def _map_markers(ax, geo: _Geometry, runs: RunsTable, safe: np.ndarray, result: PlanResult, a: int,
                 b: int) -> None:
    """Runs, near misses and proposals, projected onto factors a and b."""
    p = geo.protocol
    used = ~runs.pending
    ok_style, bad_style = runs_style()

    def projected(mask):
        return _positions(geo, a, runs.X[mask, a]), _positions(geo, b, runs.X[mask, b])

    ax.scatter(*projected(used & safe), **dict(ok_style, facecolor="white", s=30))
    ax.scatter(*projected(used & ~safe),
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


def _map_handles(md: MapData, runs: RunsTable, safe: np.ndarray, result: PlanResult, thr: float, cont: bool,
                 reached: np.ndarray) -> list:
    """The legend entries the map needs."""
    split = bool(reached.size) and reached.any() and not reached.all()  # a threshold line or hatching is drawn
    threshold = (Line2D([], [], color=OKABE_ITO["black"], lw=2.0, label=f"threshold {thr:g}") if cont else
                 Patch(facecolor="#777777", edgecolor="white", hatch="///", label=f"below the threshold {thr:g}"))
    entries = [
        (threshold, split),
        (Line2D([], [], marker="o", mfc="white", mec="black", ls="none", label=RUN_MET), True),
        (Line2D([], [], marker="^", mfc=OKABE_ITO["orange"], mec="black", ls="none", label=RUN_MISSED),
         np.any(~runs.pending & ~safe)),
        (Line2D([], [], marker="*", ms=12, color=OKABE_ITO["purple"], mec="black", ls="none",
                label="proposal (rank)"), bool(result.proposals)),
        (Line2D([], [], marker="X", ms=8, color=OKABE_ITO["vermillion"], mec="white", ls="none",
                label="near miss"), bool(result.near_misses())),
        (Patch(facecolor="white", edgecolor="black", hatch="xx", label="forbidden region"),
         np.any(md.forbidden & md.inside)),
    ]
    return [h for h, shown in entries if shown]


def _map_caption(geo: _Geometry, x0: np.ndarray, x0_what: str, pair: tuple[int, int], chosen_how: str,
                 cont: bool, reached: np.ndarray) -> str:
    a, b = pair
    thr = geo.protocol.screen.threshold
    names = geo.protocol.factor_names
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
    return " ".join(parts)


# ---------------------------------------------------------------- judged recipes
#: How a judged recipe is drawn: a diamond, filled when it passed the screen, hollow when it did not.
_JUDGED = dict(marker="D", ms=7, mec=OKABE_ITO["green"], mew=1.4, ls="none", zorder=5.5)  # under the proposals


def _judged_style(passes: bool) -> dict:
    return dict(_JUDGED, mfc=OKABE_ITO["green"] if passes else "white")


def _judged_handles(judged: Sequence[JudgedRecipe], what: str) -> list:
    """Legend entries of the judged recipes: one for those that passed, one for those that did not."""
    out = []
    for passes, text in ((True, "judged recipe that passes"), (False, "judged recipe that fails")):
        if any(r.passes == passes for r in judged):
            out.append(Line2D([], [], **_judged_style(passes), label=text + what))
    return out


def _judged_note(judged: Sequence[JudgedRecipe]) -> str:
    records = sorted({r.record for r in judged if r.record is not None})
    where = f" (judge record{'s' if len(records) > 1 else ''} {', '.join(map(str, records))})" if records else ""
    return (f"Green diamonds are recipes judged on this step's protocol and runs{where}: filled when the "
            "screen passed them, hollow when it did not; they are projected as the runs are, and on the "
            "slices drawn at this page's predicted value.")


def _judged_on_map(ax, geo: _Geometry, judged: Sequence[JudgedRecipe], a: int, b: int) -> None:
    for r in judged:
        qx, qy = _positions(geo, a, [r.x[a]])[0], _positions(geo, b, [r.x[b]])[0]
        ax.plot([qx], [qy], **_judged_style(r.passes))
        # the name to the left near the right edge, so that it stays inside the panel
        x_frac = ax.transLimits.transform((qx, qy))[0]
        right = x_frac > 0.8
        ax.annotate(r.name, (qx, qy), xytext=(-6 if right else 6, -11), textcoords="offset points",
                    ha="right" if right else "left", fontsize=7.5, color=OKABE_ITO["black"], zorder=7,
                    bbox=dict(boxstyle="round,pad=0.12", fc="white", ec="none", alpha=0.8))


def _judged_on_strip(ax, geo: _Geometry, judged: Sequence[JudgedRecipe], j: int, name: str,
                     discrete: bool) -> list[float]:
    """Each judged recipe at its factor value and its predicted value of ``name``; the values drawn."""
    if not judged:
        return []
    X = np.array([r.x for r in judged], dtype=float)
    centre = geo.predicted_centre(name, X)
    if centre is None:
        return []
    shift = _RUNS_SHIFT if discrete else 0.0
    for r, x, y in zip(judged, _positions(geo, j, X[:, j]) + shift, centre):
        ax.plot([x], [y], **_judged_style(r.passes))
    return [float(v) for v in centre]


# ---------------------------------------------------------------- model checks and history
def loo_figure(geo: _Geometry, salt: str) -> tuple[ReportFigure | None, list[dict]]:
    """Leave-one-out predictions of every fitted model against the measured values.

    Returns
    -------
    (ReportFigure or None, list of dict)
        The figure (None when no model has three runs) and one row per
        model: response, n, inside, share.
    """
    rows = []
    models = [(n, geo.result.fitted.get(n)) for n in geo.protocol.response_names]
    models = [(n, m) for n, m in models if m is not None and m.n_train >= 3]
    if not models:
        return None, rows
    ncols = min(3, len(models))
    nrows = -(-len(models) // ncols)
    pw, ph, left, wgap, hgap, bottom, top = 2.75, 2.5, 0.85, 0.85, 0.9, 0.55, 0.75
    fig = new_figure(left + ncols * pw + (ncols - 1) * wgap + 0.25,
                     top + nrows * ph + (nrows - 1) * hgap + bottom)
    axes = axes_grid(fig, nrows, ncols, left=left, right=0.25, top=top, bottom=bottom, wgap=wgap, hgap=hgap)
    for k, (name, model) in enumerate(models):
        ax = axes.flat[k]
        y = np.asarray(model.y, dtype=float)
        loo_lo, loo_hi, inside = loo_interval(model)
        loo = model.loo()
        err = np.maximum(np.vstack([loo.mean - loo_lo, loo_hi - loo.mean]), 0.0)
        ax.errorbar(y[inside], loo.mean[inside], yerr=err[:, inside], fmt="o", ms=4.5, color=OKABE_ITO["blue"],
                    elinewidth=1.0, capsize=2.5, label="inside its 95% interval")
        ax.errorbar(y[~inside], loo.mean[~inside], yerr=err[:, ~inside], fmt="^", ms=6, mfc="white",
                    mec=OKABE_ITO["vermillion"], color=OKABE_ITO["vermillion"], elinewidth=1.0, capsize=2.5,
                    label="outside its 95% interval")
        lo = float(min(y.min(), loo_lo.min()))
        hi = float(max(y.max(), loo_hi.max()))
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
        limit_handle(),
    ]
    legend_top(fig, handles, 2 if ncols == 1 else 4)
    caption = ("Leave-one-out check: each run predicted by the model fitted to all the other runs "
               "(closed form, same hyperparameters), with the 95% interval of a new measurement. "
               "About 95% of the points should fall inside their interval; far fewer means the "
               "model is overconfident and its probabilities are too optimistic. For a rate of events "
               "among subjects the interval is that of the measured rate of a cohort of the same size "
               "(2.5% and 97.5% quantiles of its count), inside [0, 1].")
    return finish_figure(fig, "model-checks", "Model checks (leave-one-out)", caption, salt), rows


def history_figure(geo: _Geometry, runs: RunsTable, safe: np.ndarray, result: PlanResult,
                   run_ids: list[str], salt: str) -> ReportFigure:
    """Every measured objective in file order, the best safe value so far, and the proposals after them."""
    p = geo.protocol
    y = runs.Y[p.objective.name]
    n = runs.n_runs
    k = np.arange(1, n + 1)
    ok = np.isfinite(y) & ~runs.pending
    # a pending run has no results yet: it cannot be the best so far
    best = best_so_far(p, {name: np.where(runs.pending, np.nan, v) for name, v in runs.Y.items()})
    fig = new_figure(10.0, 4.0)
    ax = axes_grid(fig, 1, 1, left=0.85, right=0.2, top=0.15, bottom=0.8, wgap=0.0, hgap=0.0)[0, 0]
    ax.step(k, best, where="post", color=OKABE_ITO["black"], lw=2.0, label="best safe objective so far")
    ax.scatter(k[ok & safe], y[ok & safe], marker="o", s=30, color=OKABE_ITO["blue"], zorder=3, label=RUN_MET)
    ax.scatter(k[ok & ~safe], y[ok & ~safe], marker="^", s=36, facecolor="white",
               edgecolor=OKABE_ITO["vermillion"], linewidths=1.3, zorder=3, label=RUN_MISSED)
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
    ax.set_ylabel(_with_unit(p.objective.name, p.objective.unit))
    ax.legend(loc="best", frameon=True, framealpha=0.9)
    caption = (f"Run history: every measured value of {p.objective.name} in the order of the runs file, "
               f"and the best value so far among the runs that met every limit ({p.objective.direction}). "
               "The proposals are shown to the right with their predicted value and 95% interval; "
               "they have not been made.")
    return finish_figure(fig, "history", "Run history", caption, salt)
