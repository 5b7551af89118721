"""The report's figures of the rules as attitudes to risk: each rule's pick as a predictive
distribution against the incumbent, and the price of the screen's threshold."""

from __future__ import annotations

import numpy as np
from matplotlib.lines import Line2D
from scipy.stats import norm

from guardband.planner.step import PlanResult

from guardband.planner.report.style import OKABE_ITO, ReportFigure, axes_grid, finish_figure, new_figure

__all__ = ["rules_figure", "price_figure"]

#: One colour and line style per rule (colour-blind safe, and apart in grey by the dashes).
RULE_STYLE = {
    "mean": dict(color=OKABE_ITO["blue"], ls="-"),
    "ei": dict(color=OKABE_ITO["orange"], ls="--"),
    "pi": dict(color=OKABE_ITO["green"], ls="-."),
    "bound": dict(color=OKABE_ITO["purple"], ls=":"),
}


def _unit(result: PlanResult) -> str:
    obj = result.protocol.objective
    return obj.name + (f" [{obj.unit}]" if obj.unit else "")


def _density(o: dict, y):
    """The predictive density at y: normal, or for a rate expit(f), f ~ N(latent_mean, latent_sd^2),
    the logit-normal density phi((logit y - m) / s) / (s y (1 - y))."""
    if "latent_mean" not in o:
        return norm.pdf(y, o["mean"], o["sd"])
    return norm.pdf(np.log(y / (1.0 - y)), o["latent_mean"], o["latent_sd"]) / (y * (1.0 - y))


def rules_figure(result: PlanResult, salt: str) -> ReportFigure | None:
    """The predicted distribution of the next measured result at each rule's first pick."""
    picks = [e for e in result.rule_picks if e["candidate"] is not None]
    if not picks:
        return None
    fig = new_figure(10.0, 3.6)
    ax = axes_grid(fig, 1, 1, left=0.85, right=0.2, top=0.5, bottom=0.7, wgap=0.0, hgap=0.0)[0, 0]
    lo = min(e["outcome"]["mean"] - 4 * e["outcome"]["sd"] for e in picks)
    hi = max(e["outcome"]["mean"] + 4 * e["outcome"]["sd"] for e in picks)
    inc = result.incumbent["value"] if result.incumbent else None
    if inc is not None:
        lo, hi = min(lo, inc), max(hi, inc)
    if "latent_mean" in picks[0]["outcome"]:  # a binomial objective: a rate, inside (0, 1)
        lo, hi = max(lo, 1e-4), min(hi, 1.0 - 1e-4)
    y = np.linspace(lo, hi, 400)
    handles = []
    for e in picks:
        o, style = e["outcome"], RULE_STYLE[e["rule"]]
        label = e["rule"] + (f" (= {', '.join(e['same_as'])})" if e["same_as"] else "")
        ax.plot(y, _density(o, y), lw=1.8, **style)
        handles.append(Line2D([], [], lw=1.8, label=label, **style))
    if inc is not None:
        ax.axvline(inc, color=OKABE_ITO["black"], lw=1.4)
        handles.append(Line2D([], [], color=OKABE_ITO["black"], lw=1.4,
                              label=f"best run that met every limit ({inc:.4g})"))
    ax.set_xlabel(_unit(result) + (", true rate" if "latent_mean" in picks[0]["outcome"] else ", next measured result"))
    ax.set_ylabel("predicted density")
    ax.set_yticklabels([])
    fig.legend(handles=handles, loc="upper center", ncol=min(len(handles), 5), frameon=False)
    better = "right" if result.protocol.maximize else "left"
    caption = ("What each ranking rule would propose first, among the candidates that passed the screen: "
               "the predicted distribution of the result its run would measure. Area to the "
               f"{better} of the black line is the chance of beating the best run so far. A tall, narrow "
               "curve is a safe bet (what the probability of improvement favours); a wide one reaching "
               "far past the line is a long shot (what the optimistic bound favours). Rules that pick "
               "the same run share one curve.")
    return finish_figure(fig, "rules", "What each rule would propose", caption, salt)


def price_figure(result: PlanResult, salt: str) -> ReportFigure | None:
    """The best predicted objective among candidates that pass, against the threshold."""
    price = [e for e in result.threshold_price if e["best_mean"] is not None]
    if not price:
        return None
    fig = new_figure(10.0, 3.4)
    ax = axes_grid(fig, 1, 1, left=0.85, right=0.2, top=0.35, bottom=0.7, wgap=0.0, hgap=0.0)[0, 0]
    t = np.array([e["threshold"] for e in price])
    m = np.array([e["best_mean"] for e in price])
    # only the marked thresholds are computed: a thin line joins them, no step is claimed between
    ax.plot(t, m, "-", color=OKABE_ITO["blue"], lw=0.8, alpha=0.6)
    ax.plot(t, m, "o", color=OKABE_ITO["blue"], ms=6)
    for e in price:
        ax.annotate(f"{e['n_pass']:,} pass", (e["threshold"], e["best_mean"]), textcoords="offset points",
                    xytext=(0, 8), ha="center", fontsize=7.5)
    span = max(float(m.max() - m.min()), 1e-9 * max(1.0, abs(float(m.max()))))
    ax.set_ylim(m.min() - 0.25 * span, m.max() + 0.35 * span)
    ax.set_xlim(min(t.min(), 0.5) - 0.03, 1.0)
    own = next((e for e in price if e["own"]), None)
    if own is not None:
        ax.axvline(own["threshold"], color=OKABE_ITO["vermillion"], ls="--", lw=1.2)
        ax.text(own["threshold"], 1.0, " the protocol's threshold", transform=ax.get_xaxis_transform(),
                va="bottom", ha="center", fontsize=7.5, color=OKABE_ITO["vermillion"])
    ax.set_xlabel("screen threshold (joint figure a candidate must reach)")
    ax.set_ylabel("best predicted\n" + _unit(result))
    worse = "lower" if result.protocol.maximize else "raise"
    caption = ("The price of the threshold: at each threshold, the best predicted value of "
               f"{result.protocol.objective.name} among candidates that pass the screen there (the same "
               "screen as the plan, with a local search at each threshold), and how many of the pool's "
               f"{price[0]['n_candidates']:,} candidates pass. A higher threshold can only {worse} the curve "
               "(make the best predicted value worse); "
               "where it is flat, the limits' own probabilities bind, not the threshold.")
    return finish_figure(fig, "price", "The price of the threshold", caption, salt)
