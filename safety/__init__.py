"""Guardband safety: the limit screen, the decision log and the caution texts.

Modules
-------
screen
    Hard rules, per-limit probabilities, the joint figure and the
    exclusion reasons (:func:`~guardband.safety.screen.run_screen`).
ledger
    The hash-chained decision log: append, read, verify, corrections.
canonical
    Canonical JSON (RFC 8785) and the conversion of numpy values to JSON
    types, which the decision log hashes.
cautions
    The caution texts every output a person reads carries.

Nothing is imported here; import the module you need, e.g.
``from guardband.safety.screen import joint_figure``.
"""

__all__ = ["screen", "ledger", "canonical", "cautions"]
