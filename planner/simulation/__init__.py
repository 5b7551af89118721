"""Simulated campaigns: test problems with known answers, the campaign loop, peer strategies, the runner.

Modules: :mod:`.problems` (test problems and their optima), :mod:`.loop`
(one campaign of planning steps), :mod:`.strategies` (which protocol each
strategy runs with), :mod:`.peers` (random runs and the classical route),
:mod:`.quadratic` (the classical route's models), :mod:`.runner`
(:func:`simulate`: seeds, tasks and worker processes) and :mod:`.results`
(:class:`SimulationResult`, its summaries and tables).
"""

from guardband.planner.simulation.loop import (CampaignHistory, best_so_far, run_campaign,
                                               runs_table_from_arrays)
from guardband.planner.simulation.peers import run_classical, run_random
from guardband.planner.simulation.problems import PROBLEMS, Problem, get_problem, locate_optimum
from guardband.planner.simulation.results import SimulationResult
from guardband.planner.simulation.runner import simulate
from guardband.planner.simulation.strategies import (PLANNER_STRATEGIES, STRATEGIES, combine_settings,
                                                     strategy_protocol)

__all__ = [
    "simulate",
    "SimulationResult",
    "STRATEGIES",
    "PLANNER_STRATEGIES",
    "combine_settings",
    "strategy_protocol",
    "run_random",
    "run_classical",
    "run_campaign",
    "CampaignHistory",
    "best_so_far",
    "runs_table_from_arrays",
    "Problem",
    "PROBLEMS",
    "get_problem",
    "locate_optimum",
]
