"""The page of a simulated sweep: the trade-off of gap against limit breaks, the promise in bins, the tables.

Same look as the planning report (:mod:`planner.report.style`, ``report.css``).
"""

from __future__ import annotations

import math

import matplotlib as mpl
from matplotlib.transforms import offset_copy

from guardband.planner import __version__
from guardband.planner.report.style import (OKABE_ITO, REPORT_RC, axes_grid, finish_figure, legend_rows,
                                            legend_top, new_figure)

__all__ = ["tradeoff_figure", "reliability_figure", "sweep_html"]

_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "*")
_COLOURS = [OKABE_ITO[k] for k in ("blue", "vermillion", "green", "orange", "purple", "sky", "black", "yellow")]


def _gap_keys(noisy: bool) -> tuple[str, str, str]:
    g = "gap_true_" if noisy else "gap_"
    return g + "q25", g + "median", g + "q75"


def _style(j: int, peer: bool) -> dict:
    """Marker and colour of the j-th setting (a peer's marker is hollow: it is not the planner)."""
    colour = _COLOURS[j % len(_COLOURS)]
    return dict(fmt=_MARKERS[j % len(_MARKERS)], color=colour, mfc="white" if peer else colour, mec=colour,
                mew=1.4 if peer else 1.0)


def _grid(n_panels: int, n_entries: int):
    """The figure and its panels (one per scenario, up to three a row), legend room above."""
    ncol = min(n_panels, 3)
    nrow = -(-n_panels // ncol)
    top = 0.35 + legend_rows(n_entries, 2)
    fig = new_figure(3.6 * ncol + 0.6, 2.9 * nrow + top)
    axes = axes_grid(fig, nrow, ncol, left=0.75, right=0.2, top=top, bottom=0.55, wgap=0.75, hgap=0.8)
    for ax in axes.flat[n_panels:]:
        ax.set_visible(False)
    return fig, axes


def tradeoff_figure(result):
    """One panel per scenario: median gap (with quartiles) against the share of planned runs that broke a limit."""
    rows = result.rows()
    noisy = result.noise_scale > 0
    lo_k, med_k, hi_k = _gap_keys(noisy)
    scenarios = list(dict.fromkeys(r["scenario"] for r in rows))
    settings = list(dict.fromkeys(r["setting"] for r in rows))
    peers = {r["setting"] for r in rows if r["strategy"] != "protocol"}
    with mpl.rc_context(REPORT_RC):
        fig, axes = _grid(len(scenarios), len(settings))
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
                h = ax.errorbar([x], [y], yerr=[[lo], [hi]], ms=6, capsize=3, lw=1.1, transform=shift,
                                label=label + (" (peer)" if label in peers else ""), **_style(j, label in peers))
                most, tallest = max(most, x), max(tallest, y + hi)
                if i == 0:
                    handles.append(h)
            ax.set_title(f"scenario {name}")
            ax.set_xlabel("planned runs that broke a limit (%)")
            ax.set_ylabel(("true gap" if noisy else "gap") + " at the end (median, quartiles)")
            ax.set_xlim(-0.05 * max(most, 5.0), 1.1 * max(most, 5.0))
            # the shifted markers do not update the data limits: set both axes from the figures
            ax.set_ylim(0, 1.1 * tallest if tallest > 0 else 1.0)
        legend_top(fig, handles, 2)
    caption = ("Lower left is better: a small gap to the known optimum, few planned runs that broke a "
               "limit. Each marker is one setting; the bar spans the quartiles of the gap over the seeds. "
               + ("Hollow markers are the planner's peers (random runs, the classical route) on the same "
                  "starting runs and truths. " if peers else "") +
               "Markers are drawn a few points apart on the page so that equal figures stay visible. "
               "A setting missing from a panel had no safe run in most campaigns (infinite gap).")
    return finish_figure(fig, "tradeoff", "Gap to the optimum against limit breaks", caption, "sweep")


def reliability_figure(result):
    """One panel per scenario: each bin's mean promised joint figure against the share of its planned
    runs that met every limit, with the exact 95% interval; None when no planned run had a promise."""
    bins = [b for b in result.calibration_rows() if b["runs"]]
    if not bins:
        return None
    scenarios = list(dict.fromkeys(r["scenario"] for r in result.rows()))
    settings = list(dict.fromkeys(r["setting"] for r in result.rows()))  # the trade-off plot's order
    shown = [s for s in settings if any(b["setting"] == s for b in bins)]
    edge = max(0.0, min(b["low"] for b in bins) - 0.01)
    floor = max(0.0, min(edge, min(b["ci_low"] for b in bins)) - 0.02)
    with mpl.rc_context(REPORT_RC):
        fig, axes = _grid(len(scenarios), len(shown) + 1)
        handles = []
        for i, name in enumerate(scenarios):
            ax = axes.flat[i]
            kept, = ax.plot([edge, 1.0], [edge, 1.0], color="#777777", ls="--", lw=1.0, label="promise kept")
            for j, label in enumerate(settings):
                mine = [b for b in bins if b["scenario"] == name and b["setting"] == label]
                if not mine:
                    continue
                x = [b["mean_promised"] for b in mine]
                y = [b["met_share"] for b in mine]
                err = [[v - b["ci_low"] for v, b in zip(y, mine)], [b["ci_high"] - v for v, b in zip(y, mine)]]
                shift = offset_copy(ax.transData, fig=fig, x=4.0 * (j - (len(settings) - 1) / 2), units="points")
                h = ax.errorbar(x, y, yerr=err, ms=5, capsize=3, lw=1.0, label=label, transform=shift,
                                **_style(j, False))
                if label not in [hh.get_label() for hh in handles]:
                    handles.append(h)
            ax.set_title(f"scenario {name}")
            ax.set_xlabel("promised joint figure (bin mean)")
            ax.set_ylabel("share that met every limit")
            ax.set_xlim(edge, 1.005)
            ax.set_ylim(floor, 1.02)
        legend_top(fig, [kept] + handles, 2)
    caption = ("Each marker is one bin of promised joint figures ([threshold, 0.9), [0.9, 0.95), [0.95, 0.99), "
               "[0.99, 1]) of one setting, over all its seeds: the bin's mean promise against the share of its "
               "planned runs whose true values met every limit, with the exact 95% interval (Clopper-Pearson). "
               "On or above the dashed line the promise was kept; few runs give wide intervals (the table "
               "below counts the runs in each bin). Markers are drawn a few points apart so that equal "
               "figures stay visible. Peers promise nothing and are not shown.")
    return finish_figure(fig, "reliability", "The promise in bins: promised against met", caption, "sweep")


def sweep_html(result, *, title: str, kind: str) -> str:
    """The whole page as HTML text."""
    from guardband.planner.report.page import _environment

    noisy = result.noise_scale > 0
    lo_k, med_k, hi_k = _gap_keys(noisy)
    from guardband.planner.simulation.results import _fmt, _pct, true_gap_band
    from guardband.planner.simulation.sweep import _bin_label

    word = "true gap" if noisy else "gap"
    header = ["setting", "scenario", f"{word} (median [IQR])", f"{word} halfway", "broke a limit", "runs until within",
              "stalled", "promised", "met"]
    rows = [[r["setting"], r["scenario"], true_gap_band(r, r["seeds"]) if noisy else
             f"{_fmt(r[med_k])} [{_fmt(r[lo_k])}, {_fmt(r[hi_k])}]",
             _fmt(r[med_k + "_halfway"]), _pct(r["broken_pooled"]),
             f"{_fmt(r['runs_until_within_median'])} ({r['reached']}/{r['seeds']} within {_fmt(r['within'])})",
             f"{r['stalled']}/{r['seeds']}", _fmt(r["promised_joint_mean"]), _fmt(r["observed_met_share"])]
            for r in result.rows()]
    cal_header = ["setting", "scenario", "promised joint", "runs", "met", "mean promised", "share met",
                  "95% interval (exact)"]
    cal_rows = [[b["setting"], b["scenario"], _bin_label(b), b["runs"], b["met"], _fmt(b["mean_promised"]),
                 _fmt(b["met_share"]), f"[{_fmt(b['ci_low'])}, {_fmt(b['ci_high'])}]" if b["runs"] else "-"]
                for b in result.calibration_rows()]
    template = _environment().get_template("sweep.html.j2")
    return template.render(version=__version__, title=title, kind=kind, cautions=result.cautions(),
                           description=result.description(), figure=tradeoff_figure(result), header=header,
                           rows=rows, noisy=noisy, reliability=reliability_figure(result), cal_header=cal_header,
                           cal_rows=cal_rows)
