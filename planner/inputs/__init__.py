"""Inputs: the protocol file, the rule parser, units in column headers, the runs table."""
