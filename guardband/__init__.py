"""Guardband: constrained, safety-screened planning of formulation and dose studies.

``import guardband`` gives the public API for notebooks and scripts; the
parts live in two packages, ``guardband.planner`` (inputs, design space,
models, the planning step, the commands' work, reports, simulation) and
``guardband.safety`` (the screen, the decision log, canonical JSON, the
caution texts). Names are loaded on first use, so that the command line
starts without importing what a command does not need.

Decision support only: a qualified person reviews every proposed run, and
the applicable regulations, pharmacopoeia and local codes decide the limits.
"""

from __future__ import annotations

from guardband.planner import __version__
from guardband.planner.lazy import lazy_names

#: public name -> module that defines it
_PUBLIC = {
    "load_protocol": "guardband.planner.inputs.protocol",
    "parse_protocol": "guardband.planner.inputs.protocol",
    "Protocol": "guardband.planner.inputs.protocol",
    "read_runs": "guardband.planner.app.notebook",
    "plan": "guardband.planner.app.notebook",
    "Plan": "guardband.planner.app.notebook",
    "parse_runs_text": "guardband.planner.inputs.runs",
    "RunsTable": "guardband.planner.inputs.runs",
    "plan_step": "guardband.planner.step.plan",
    "PlanResult": "guardband.planner.step.plan",
    "check_protocol": "guardband.planner.app.workflow",
    "run_plan": "guardband.planner.app.workflow",
    "replay_record": "guardband.planner.app.workflow",
    "summarize_log": "guardband.planner.app.review",
    "report_folder": "guardband.planner.report",
    "simulate": "guardband.planner.simulation.runner",
    "verify_log": ("guardband.safety.ledger", "verify"),
    "GuardbandError": "guardband.planner.errors",
}

__all__ = ["__version__", *sorted(_PUBLIC)]


__getattr__, __dir__ = lazy_names(__name__, _PUBLIC)
