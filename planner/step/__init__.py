"""One planning step: models, candidate pool, the safety screen, ranking, the batch.

The step is a pipeline of named phases (:mod:`.plan`): fit the models
(:mod:`.fitting`), make the pool (:mod:`.pool`), screen it through
:mod:`guardband.safety.screen` (:mod:`.context`), refine the best candidates
(:mod:`.refine`), choose the batch (:mod:`.batch`). The ranking rules are in
:mod:`.acquisition`; the outcome is a :class:`PlanResult` (:mod:`.result`).
"""

from guardband.planner.step.fitting import MIN_OBJECTIVE_RUNS
from guardband.planner.step.plan import plan_step, safe_runs_mask
from guardband.planner.step.result import Mode, ModelStatus, ModelSummary, PlanResult, Proposal

__all__ = ["plan_step", "safe_runs_mask", "PlanResult", "Proposal", "ModelSummary", "Mode", "ModelStatus",
           "MIN_OBJECTIVE_RUNS"]
