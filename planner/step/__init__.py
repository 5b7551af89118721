"""One planning step: models, candidate pool, the safety screen, ranking, the batch.

The step is a pipeline of named phases (:mod:`.plan`): fit the models
(:mod:`.fitting`), make the pool (:mod:`.pool`), screen it through
:mod:`guardband.safety.screen` (:mod:`.context`), refine the best candidates
(:mod:`.refine`), choose the batch (:mod:`.batch`). The ranking rules are in
:mod:`.acquisition`; the outcome is a :class:`PlanResult` (:mod:`.result`).
Each name loads its module on first use.
"""

from guardband.planner.lazy import lazy_names

#: public name -> the module that defines it (loaded on first use)
_NAMES = {
    "plan_step": "guardband.planner.step.plan",
    "safe_runs_mask": "guardband.planner.step.plan",
    "PlanResult": "guardband.planner.step.result",
    "Proposal": "guardband.planner.step.result",
    "ModelSummary": "guardband.planner.step.result",
    "Mode": "guardband.planner.step.result",
    "ModelStatus": "guardband.planner.step.result",
    "MIN_OBJECTIVE_RUNS": "guardband.planner.step.fitting",
}

__all__ = ["plan_step", "safe_runs_mask", "PlanResult", "Proposal", "ModelSummary", "Mode", "ModelStatus",
           "MIN_OBJECTIVE_RUNS"]

__getattr__, __dir__ = lazy_names(__name__, _NAMES)
