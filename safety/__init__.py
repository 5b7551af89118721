"""Guardband safety: the limit screen, the decision log and the caution texts."""
