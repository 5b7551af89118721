"""The strategies of a simulation and the protocol each one runs with.

How the settings combine
------------------------
The *problem's* protocol supplies the world: factors, mixture and linear
constraints, objective, limits with their probabilities and ``min_runs``,
the start region, ``max_step`` and forbidden regions. The *settings*
protocol (the user's, e.g. ``protocols/tablet_blend.toml``) supplies how
the planner searches and screens: ``screen.threshold``, ``screen.joint``,
``screen.short_model``, ``screen.widen_from_loo``, ``ranking`` (rule,
kappa, xi), ``batch.size``, ``batch.pool``, ``batch.refine``, ``batch.method``,
``batch.search_per_run``, ``batch.least_worth`` and the
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
``textbook``
    The textbook constrained rule, for comparison: the same GP core (one
    model per response, weak priors; a limit model's prior mean at the mean
    of its data, as the textbook fits it, not at the limit),
    ranked by expected improvement times the product of the limits'
    probabilities, and, while no run meets every limit, by that
    product alone; no screen (threshold and limit probabilities at
    :data:`SCREEN_OFF`), none of Guardband's guards on the limit models
    (short model, leave-one-out and local widening, single-run check, the
    length-scale cap, the signal-variance floor) and no step or span rule.
    The design space and forbidden regions stay (they are the world's, not the planner's).
    :func:`step_options` gives the planning step's ``textbook`` switch.
"""

from __future__ import annotations

from guardband.planner.inputs.protocol import RANKING_RULES, Protocol, parse_protocol
from guardband.planner.simulation.problems import Problem

__all__ = ["STRATEGIES", "DEFAULT_STRATEGIES", "PEERS", "PLANNER_STRATEGIES", "SCREEN_OFF", "combine_settings",
           "strategy_protocol", "step_options", "check_strategy"]

STRATEGIES = ("protocol", "ei", "pi", "bound", "mean", "random", "classical", "screen-off", "textbook")
#: What :func:`~guardband.planner.simulation.runner.simulate` runs when no strategies are named.
DEFAULT_STRATEGIES = STRATEGIES[:-1]
#: The planner's peers (:mod:`~guardband.planner.simulation.peers`): the strategies that do not plan.
PEERS = ("random", "classical")
PLANNER_STRATEGIES = ("protocol",) + RANKING_RULES + ("screen-off", "textbook")
#: The textbook strategy's limit-model length-scale cap: the largest the protocol allows (no cap).
NO_CAP = 1000.0
#: Threshold and limit probability of the ``screen-off`` strategy.
SCREEN_OFF = 1e-9


def combine_settings(problem: Problem, settings: Protocol | None, *, pool: int | None = None) -> Protocol:
    """The problem's protocol with the planner settings of ``settings`` (and ``pool`` candidates, given).

    Parameters
    ----------
    problem : Problem
    settings : Protocol or None
        Supplies screen.threshold, screen.joint, screen.short_model,
        screen.widen_from_loo, ranking, batch.size, batch.pool,
        batch.refine, batch.method, batch.search_per_run, batch.least_worth and the model
        settings (restarts, the priors rule,
        the limit models' length-scale cap); None keeps the problem's own.
    pool : int, optional
        Candidates drawn per step, over the settings' (a command-line override).

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
        for key in ("size", "pool", "refine", "method", "search_per_run", "least_worth"):
            data["batch"][key] = getattr(settings.batch, key)
        data["model"] = settings.model.model_dump(mode="python")
    if pool is not None:
        data["batch"]["pool"] = int(pool)
    return parse_protocol(data, source=f"problem {problem.name} with settings")


def strategy_protocol(protocol: Protocol, strategy: str) -> Protocol | None:
    """The protocol a planner strategy runs with (None for random and classical)."""
    check_strategy(strategy)
    if strategy in PEERS:
        return None
    if strategy == "protocol":
        return protocol
    data = protocol.model_dump(mode="python")
    if strategy in ("screen-off", "textbook"):
        data["screen"]["threshold"] = SCREEN_OFF
        data["screen"]["joint"] = "independent"
        for lim in data["limits"]:
            lim["probability"] = SCREEN_OFF
    if strategy == "textbook":
        data["screen"].update(short_model=False, widen_from_loo=False, widen_locally=False,
                              single_run_check=False, span_reach=None, max_step=None)
        data["model"]["limit_length_scale_max"] = NO_CAP
        data["ranking"]["rule"] = "ei"
    elif strategy != "screen-off":
        data["ranking"]["rule"] = strategy
    return parse_protocol(data, source=f"strategy {strategy}")


def step_options(strategy: str) -> dict:
    """Keyword arguments of :func:`~guardband.planner.step.plan_step` for a planner strategy
    (``textbook`` for ``textbook``, nothing for the others)."""
    check_strategy(strategy)
    return {"textbook": True} if strategy == "textbook" else {}


def check_strategy(strategy: str) -> None:
    """Raise ValueError, listing the strategies, when ``strategy`` is not one of :data:`STRATEGIES`."""
    if strategy not in STRATEGIES:
        raise ValueError(f"unknown strategy {strategy!r}; strategies: {', '.join(STRATEGIES)}")
