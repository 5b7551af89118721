"""Inputs, validated once at the edge: the protocol file, the rule parser, units, the runs table.

:mod:`.protocol` (pydantic models of the protocol, its fingerprint),
:mod:`.rules` (linear rules such as ``mcc >= 2 * lactose``, parsed without
``eval``), :mod:`.units` (units in column headers), :mod:`.runs` (the runs
table: every problem named with its row and column).
"""

from guardband.planner.inputs.protocol import Limit, Protocol, load_protocol, parse_protocol
from guardband.planner.inputs.rules import LinearRule, RuleSyntaxError, parse_rule
from guardband.planner.inputs.runs import RunsTable, parse_runs_text, read_runs, read_runs_bytes

__all__ = ["Protocol", "Limit", "load_protocol", "parse_protocol", "LinearRule", "RuleSyntaxError",
           "parse_rule", "RunsTable", "read_runs", "read_runs_bytes", "parse_runs_text"]
