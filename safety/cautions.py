"""Caution texts that go with every output a person reads.

The terminal output, every CSV table of runs or recipes (a ``cautions``
column in every row, and the table's ``.notes.txt`` file), the report and
the JSON output all carry these sentences. The wording keeps the roles
clear: the tool proposes and estimates; qualified people decide.
"""

from __future__ import annotations

__all__ = [
    "STUDY_KINDS",
    "GENERAL",
    "DOSE",
    "cautions_for",
    "as_text",
    "as_json",
]

#: Study kinds a protocol can declare.
STUDY_KINDS = ("formulation", "dose")

#: Cautions for every study.
GENERAL: tuple[str, ...] = (
    "Decision support only: Guardband proposes runs and estimates probabilities; "
    "it does not make decisions.",
    "A qualified person reviews every proposed run before it is made.",
    "Limits and thresholds follow the applicable regulations, pharmacopoeia and local "
    "codes and your own quality unit, not this tool.",
    "Probabilities are estimates that assume the models are adequate for the data "
    "(check the model diagnostics); they are not guarantees.",
)

#: Further cautions for dose studies.
DOSE: tuple[str, ...] = (
    "Any dose study requires approval by the responsible ethics committee and "
    "regulator before it starts.",
    "This tool is not for dosing patients or for choosing a dose for any person.",
    "Dose proposals are only inputs to the protocol-defined dose-escalation decision, "
    "which the study's qualified investigators and safety review committee make.",
)


def cautions_for(study_kind: str) -> tuple[str, ...]:
    """The cautions for one kind of study.

    Parameters
    ----------
    study_kind : {"formulation", "dose"}
        The protocol's study kind.

    Returns
    -------
    tuple of str
        :data:`GENERAL`, followed by :data:`DOSE` for a dose study.

    Raises
    ------
    ValueError
        An unknown study kind.
    """
    if study_kind == "formulation":
        return GENERAL
    if study_kind == "dose":
        return GENERAL + DOSE
    raise ValueError(
        f"study_kind must be one of {', '.join(map(repr, STUDY_KINDS))}, got {study_kind!r}"
    )


def as_text(study_kind: str, *, prefix: str = "") -> str:
    """The cautions as lines of text, one caution per line.

    Parameters
    ----------
    study_kind : {"formulation", "dose"}
        The protocol's study kind.
    prefix : str, default ""
        Put before every line, e.g. ``"# "`` for CSV comment lines or
        ``"  - "`` for a terminal list.

    Returns
    -------
    str
        The lines joined with ``"\\n"``, without a final newline.
    """
    return "\n".join(prefix + caution for caution in cautions_for(study_kind))


def as_json(study_kind: str) -> list[str]:
    """The cautions as a new list of strings, for JSON output."""
    return list(cautions_for(study_kind))
