"""The strategies of a simulation and the protocol each one runs with.

How the settings combine
------------------------
The *problem's* protocol supplies the world: factors, mixture and linear
constraints, objective, limits with their probabilities and ``min_runs``,
the start region, ``max_step`` and forbidden regions. The *settings*
protocol (the user's, e.g. ``protocols/tablet_blend.toml``) supplies how
the planner searches and screens: ``screen.threshold``, ``screen.joint``,
``screen.short_model``, ``screen.widen_from_loo``, ``ranking`` (rule,
kappa, xi), ``batch.size``, ``batch.pool``, ``batch.refine`` and the
``model`` table (restarts, the priors rule, the limit models'
length-scale cap). The measurement sds belong to the world (the problem's
assays). Without a settings protocol the problem's own values are used.

Strategies (:data:`STRATEGIES`)
-------------------------------
``protocol``
    The combined protocol as it is.
``ei``, ``pi``, ``bound``, ``mean``
    The same, with that ranking rule.
``random``
    The same starting runs, then the budget spent on points drawn
    uniformly from the design space (:func:`~guardband.planner.simulation.peers.run_random`).
``classical``
    A space-filling design, quadratic fits and one confirmation run
    (:func:`~guardband.planner.simulation.peers.run_classical`).
``screen-off``
    The ``protocol`` strategy with the probability screen switched off:
    the joint threshold and every limit's probability set to
    :data:`SCREEN_OFF` (and the joint figure computed as a product, since
    the bound max(0, 1 - sum(1 - p_i)) is 0 for two limits at tiny p_i).
    The hard rules (design space, ``max_step``, forbidden regions) stay.
"""

from __future__ import annotations

from guardband.planner.inputs.protocol import RANKING_RULES, Protocol, parse_protocol
from guardband.planner.simulation.problems import Problem

__all__ = ["STRATEGIES", "PLANNER_STRATEGIES", "SCREEN_OFF", "combine_settings", "strategy_protocol",
           "check_strategy"]

STRATEGIES = ("protocol", "ei", "pi", "bound", "mean", "random", "classical", "screen-off")
PLANNER_STRATEGIES = ("protocol",) + RANKING_RULES + ("screen-off",)
#: Threshold and limit probability of the ``screen-off`` strategy.
SCREEN_OFF = 1e-9


def combine_settings(problem: Problem, settings: Protocol | None) -> Protocol:
    """The problem's protocol with the planner settings of ``settings``.

    Parameters
    ----------
    problem : Problem
    settings : Protocol or None
        Supplies screen.threshold, screen.joint, screen.short_model,
        screen.widen_from_loo, ranking, batch.size, batch.pool,
        batch.refine and the model settings (restarts, the priors rule,
        the limit models' length-scale cap); None keeps the problem's own.

    Returns
    -------
    Protocol
    """
    data = problem.protocol.model_dump(mode="python")
    if settings is not None:
        data["screen"]["threshold"] = settings.screen.threshold
        data["screen"]["joint"] = settings.screen.joint
        data["screen"]["short_model"] = settings.screen.short_model
        data["screen"]["widen_from_loo"] = settings.screen.widen_from_loo
        data["ranking"] = settings.ranking.model_dump(mode="python")
        for key in ("size", "pool", "refine"):
            data["batch"][key] = getattr(settings.batch, key)
        data["model"] = settings.model.model_dump(mode="python")
    return parse_protocol(data, source=f"problem {problem.name} with settings")


def strategy_protocol(protocol: Protocol, strategy: str) -> Protocol | None:
    """The protocol a planner strategy runs with (None for random and classical)."""
    check_strategy(strategy)
    if strategy in ("random", "classical"):
        return None
    if strategy == "protocol":
        return protocol
    data = protocol.model_dump(mode="python")
    if strategy == "screen-off":
        data["screen"]["threshold"] = SCREEN_OFF
        data["screen"]["joint"] = "independent"
        for lim in data["limits"]:
            lim["probability"] = SCREEN_OFF
    else:
        data["ranking"]["rule"] = strategy
    return parse_protocol(data, source=f"strategy {strategy}")


def check_strategy(strategy: str) -> None:
    """Raise ValueError, listing the strategies, when ``strategy`` is not one of :data:`STRATEGIES`."""
    if strategy not in STRATEGIES:
        raise ValueError(f"unknown strategy {strategy!r}; strategies: {', '.join(STRATEGIES)}")
