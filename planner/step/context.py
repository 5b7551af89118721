"""What every phase of a planning step shares: the space, the rules, the models, the anchors.

:class:`StepContext` predicts every response at points and screens them,
always through the functions of :mod:`guardband.safety.screen`, so the pool,
the local refinement, the batch and the report judge points alike.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from guardband.planner.inputs.protocol import Protocol
from guardband.planner.step.fitting import FittedModels
from guardband.planner.step.result import Scaler
from guardband.safety.limits import ScreenRules
from guardband.safety.screen import (
    HardRules,
    LimitPrediction,
    ScreenResult,
    hard_rules,
    limit_predictions,
    screen_points,
)

__all__ = ["StepContext"]


@dataclass
class StepContext:
    """The fixed parts of one planning step."""

    protocol: Protocol
    space: object
    scaler: Scaler
    rules: ScreenRules
    models: FittedModels
    anchors: np.ndarray  # unit-scaled runs the step is measured from
    step_basis: str
    #: rank by the rule's value times the joint figure (the textbook constrained rule of the
    #: simulator's ``textbook`` strategy; a planning step from a protocol never sets it)
    weigh_by_joint: bool = False
    _hard: tuple = field(default=(None, None), repr=False)

    def limit_predictions(self, U=None, lim_models=None) -> list[LimitPrediction]:
        """Each limit as the screen judges it, at U (or from posteriors over fixed points)."""
        models = self.models.limits if lim_models is None else lim_models
        return limit_predictions(self.rules.limits, models, U, unavailable=self.models.unavailable())

    def predict(self, X):
        """(U, objective mean, objective sd, limit predictions) at points X (protocol units)."""
        U = self.scaler.unit(X)
        mu, sd = self.models.objective.predict(U)
        return U, mu, sd, self.limit_predictions(U)

    def hard(self, X, U) -> HardRules:
        """The hard rules at X, computed once per set of points."""
        key, value = self._hard
        if key is not X:
            value = hard_rules(self.rules, self.space, X, U, self.anchors, step_basis=self.step_basis,
                               span_columns=self.continuous_columns())
            self._hard = (X, value)
        return value

    def continuous_columns(self) -> np.ndarray:
        """Which free factors (the columns of U) have no discrete levels."""
        free = np.flatnonzero(self.scaler.free)
        return np.array([int(j) not in self.space.levels for j in free], dtype=bool)

    def screen(self, X, U, predictions) -> ScreenResult:
        return screen_points(self.rules, self.hard(X, U), predictions)
