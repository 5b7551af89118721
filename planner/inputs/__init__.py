"""Inputs, validated once at the edge: the protocol file, the rule parser, units, the runs table.

:mod:`.protocol` (pydantic models of the protocol, its fingerprint),
:mod:`.rules` (linear rules such as ``mcc >= 2 * lactose``, parsed without
``eval``), :mod:`.units` (units in column headers), :mod:`.runs` (the runs
table: every problem named with its row and column). Each name loads its
module on first use.
"""

from guardband.planner.lazy import lazy_names

#: public name -> the module that defines it (loaded on first use)
_NAMES = {
    "Protocol": "guardband.planner.inputs.protocol",
    "Limit": "guardband.planner.inputs.protocol",
    "load_protocol": "guardband.planner.inputs.protocol",
    "parse_protocol": "guardband.planner.inputs.protocol",
    "LinearRule": "guardband.planner.inputs.rules",
    "RuleSyntaxError": "guardband.planner.inputs.rules",
    "parse_rule": "guardband.planner.inputs.rules",
    "RunsTable": "guardband.planner.inputs.runs",
    "read_runs": "guardband.planner.inputs.runs",
    "read_runs_bytes": "guardband.planner.inputs.runs",
    "parse_runs_text": "guardband.planner.inputs.runs",
}

__all__ = ["Protocol", "Limit", "load_protocol", "parse_protocol", "LinearRule", "RuleSyntaxError",
           "parse_rule", "RunsTable", "read_runs", "read_runs_bytes", "parse_runs_text"]

__getattr__, __dir__ = lazy_names(__name__, _NAMES)
