"""Guardband planner: protocol, design space, models, ranking and the planning step."""

__version__ = "0.1.0"
