"""Test problems with known answers, for simulated campaigns.

A problem is a protocol (as a dict, validated by :func:`parse_protocol`)
plus a function that plays the lab: it returns every response for a set of
runs. Adding one is a short step: write a :class:`Problem` with its source,
its protocol, its ``evaluate`` and its known optimum, and add it to
:data:`PROBLEMS`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from .protocol import Protocol, parse_protocol

__all__ = ["Problem", "PROBLEMS", "get_problem", "gramacy_protocol_dict"]


@dataclass(frozen=True)
class Problem:
    """A test problem.

    Attributes
    ----------
    name : str
    source : str
        Where it comes from (a publication, or "invented").
    protocol_dict : dict
        The protocol, before validation.
    evaluate : callable
        ``evaluate(X) -> dict[str, ndarray]``: the true responses for runs X
        of shape (n, n_factors) in protocol units (no noise).
    optimum : float
        The best objective among points that meet every limit.
    optimum_x : tuple of float
        Where it is (approximately).
    noise : dict of str to float
        Default measurement noise sd per response.
    """

    name: str
    source: str
    protocol_dict: dict
    evaluate: Callable[[np.ndarray], dict]
    optimum: float
    optimum_x: tuple[float, ...]
    noise: dict

    @property
    def protocol(self) -> Protocol:
        return parse_protocol(self.protocol_dict, source=f"problem {self.name}")


def gramacy_protocol_dict(*, batch: int = 3, rule: str = "ei", threshold: float = 0.9,
                          probability: float = 0.95) -> dict:
    """Protocol for the Gramacy et al. (2016) toy problem."""
    return {
        "seed": 1,
        "study": {"title": "Gramacy et al. (2016) constrained toy problem", "version": "1",
                  "author": "test", "kind": "formulation"},
        "factors": [
            {"name": "x1", "kind": "continuous", "lower": 0.0, "upper": 1.0},
            {"name": "x2", "kind": "continuous", "lower": 0.0, "upper": 1.0},
        ],
        "objective": {"name": "f", "direction": "minimize"},
        "limits": [
            {"name": "c1", "upper": 0.0, "probability": probability},
            {"name": "c2", "upper": 0.0, "probability": probability},
        ],
        "screen": {"threshold": threshold, "joint": "bound", "min_runs": 5},
        "ranking": {"rule": rule},
        "batch": {"size": batch, "pool": 2000, "refine": 3},
        "model": {"restarts": 3},
    }


def _gramacy(X: np.ndarray) -> dict:
    x1, x2 = X[:, 0], X[:, 1]
    return {
        "f": x1 + x2,
        "c1": 1.5 - x1 - 2.0 * x2 - 0.5 * np.sin(2.0 * np.pi * (x1**2 - 2.0 * x2)),
        "c2": x1**2 + x2**2 - 1.5,
    }


GRAMACY = Problem(
    name="gramacy",
    source=("Gramacy et al. (2016), Technometrics 58(1):1-11 (citation published; "
            "optimum 0.5998 at about (0.1954, 0.4044) from memory)"),
    protocol_dict=gramacy_protocol_dict(),
    evaluate=_gramacy,
    optimum=0.5998,
    optimum_x=(0.1954, 0.4044),
    noise={"f": 0.0, "c1": 0.0, "c2": 0.0},
)

PROBLEMS: dict[str, Problem] = {GRAMACY.name: GRAMACY}


def get_problem(name: str) -> Problem:
    """A built-in problem by name (ValueError listing the names otherwise)."""
    try:
        return PROBLEMS[name]
    except KeyError:
        raise ValueError(f"unknown problem {name!r}; built-in problems: {', '.join(sorted(PROBLEMS))}") from None
