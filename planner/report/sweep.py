"""The page of a simulated sweep: the trade-off of gap against limit breaks, and the table.

Same look as the planning report (:mod:`planner.report.style`, ``report.css``).
"""

from __future__ import annotations

import math

import matplotlib as mpl
from matplotlib.transforms import offset_copy

from guardband.planner import __version__
from guardband.planner.report.style import (OKABE_ITO, REPORT_RC, axes_grid, finish_figure, legend_rows,
                                            legend_top, new_figure)

__all__ = ["tradeoff_figure", "sweep_html"]

_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "*")
_COLOURS = [OKABE_ITO[k] for k in ("blue", "vermillion", "green", "orange", "purple", "sky", "black", "yellow")]


def _gap_keys(noisy: bool) -> tuple[str, str, str]:
    g = "gap_true_" if noisy else "gap_"
    return g + "q25", g + "median", g + "q75"


def tradeoff_figure(result):
    """One panel per scenario: median gap (with quartiles) against the share of planned runs that broke a limit."""
    rows = result.rows()
    noisy = result.noise_scale > 0
    lo_k, med_k, hi_k = _gap_keys(noisy)
    scenarios = list(dict.fromkeys(r["scenario"] for r in rows))
    settings = list(dict.fromkeys(r["setting"] for r in rows))
    ncol = min(len(scenarios), 3)
    nrow = -(-len(scenarios) // ncol)
    top = 0.35 + legend_rows(len(settings), 2)
    with mpl.rc_context(REPORT_RC):
        fig = new_figure(3.6 * ncol + 0.6, 2.9 * nrow + top)
        axes = axes_grid(fig, nrow, ncol, left=0.75, right=0.2, top=top, bottom=0.55, wgap=0.75, hgap=0.8)
        handles = []
        for i, name in enumerate(scenarios):
            ax = axes.flat[i]
            most, tallest = 0.0, 0.0
            for j, label in enumerate(settings):
                r = next((r for r in rows if r["scenario"] == name and r["setting"] == label), None)
                if r is None:
                    continue
                x, y = 100 * r["broken_pooled"], r[med_k]
                if not (math.isfinite(x) and math.isfinite(y)):
                    continue
                lo = y - r[lo_k] if math.isfinite(r[lo_k]) else 0.0
                hi = r[hi_k] - y if math.isfinite(r[hi_k]) else 0.0
                # settings side by side (a few points apart on the page), so equal figures stay visible
                shift = offset_copy(ax.transData, fig=fig, x=5.0 * (j - (len(settings) - 1) / 2), units="points")
                h = ax.errorbar([x], [y], yerr=[[lo], [hi]], fmt=_MARKERS[j % len(_MARKERS)], ms=6,
                                color=_COLOURS[j % len(_COLOURS)], capsize=3, lw=1.1, label=label,
                                transform=shift)
                most, tallest = max(most, x), max(tallest, y + hi)
                if i == 0:
                    handles.append(h)
            ax.set_title(f"scenario {name}")
            ax.set_xlabel("planned runs that broke a limit (%)")
            ax.set_ylabel(("true gap" if noisy else "gap") + " at the end (median, quartiles)")
            ax.set_xlim(-0.05 * max(most, 5.0), 1.1 * max(most, 5.0))
            # the shifted markers do not update the data limits: set both axes from the figures
            ax.set_ylim(0, 1.1 * tallest if tallest > 0 else 1.0)
        for ax in axes.flat[len(scenarios):]:
            ax.set_visible(False)
        legend_top(fig, handles, 2)
    caption = ("Lower left is better: a small gap to the known optimum, few planned runs that broke a "
               "limit. Each marker is one setting; the bar spans the quartiles of the gap over the seeds. "
               "Markers are drawn a few points apart on the page so that equal figures stay visible. "
               "A setting missing from a panel had no safe run in most campaigns (infinite gap).")
    return finish_figure(fig, "tradeoff", "Gap to the optimum against limit breaks", caption, "sweep")


def sweep_html(result, *, title: str, kind: str) -> str:
    """The whole page as HTML text."""
    from guardband.planner.report.page import _environment

    noisy = result.noise_scale > 0
    lo_k, med_k, hi_k = _gap_keys(noisy)
    from guardband.planner.simulation.results import _fmt, _pct

    word = "true gap" if noisy else "gap"
    header = ["setting", "scenario", f"{word} (median [IQR])", f"{word} halfway", "broke a limit", "runs until within",
              "stalled", "promised", "met"]
    rows = [[r["setting"], r["scenario"], f"{_fmt(r[med_k])} [{_fmt(r[lo_k])}, {_fmt(r[hi_k])}]",
             _fmt(r[med_k + "_halfway"]), _pct(r["broken_pooled"]),
             f"{_fmt(r['runs_until_within_median'])} ({r['reached']}/{r['seeds']} within {_fmt(r['within'])})",
             f"{r['stalled']}/{r['seeds']}", _fmt(r["promised_joint_mean"]), _fmt(r["observed_met_share"])]
            for r in result.rows()]
    template = _environment().get_template("sweep.html.j2")
    return template.render(version=__version__, title=title, kind=kind, cautions=result.cautions(),
                           description=result.description(), figure=tradeoff_figure(result), header=header,
                           rows=rows, noisy=noisy)
