"""Hints for the protocol mistakes people make most: a key in the wrong table, percent mixtures,
a name with a space in a rule.

Each function returns the extra words of a message (or ""), so that the
message itself stays where the mistake is found (``protocol.py``,
``rulechecks.py``, ``runchecks.py``). They read the pydantic models, never a list of their own.
"""

from __future__ import annotations

import difflib
import re
import types
import typing

from pydantic import BaseModel

__all__ = ["unknown_key_hint", "choice_hint", "quoted_rule", "percent_total_hint", "PLAIN_NAME"]

#: A name a rule can use without backquotes.
PLAIN_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def _model_of(annotation) -> type[BaseModel] | None:
    """The table model inside an annotation (``X``, ``X | None``, ``tuple[X, ...]``, ``list[X]``), if any."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    if typing.get_origin(annotation) in (typing.Union, types.UnionType, tuple, list, typing.Annotated):
        for arg in typing.get_args(annotation):
            found = _model_of(arg)
            if found is not None:
                return found
    return None


def _tables(root: type[BaseModel]) -> list[tuple[str, type[BaseModel]]]:
    """(TOML path, model) of every table, the top level as ""."""
    out = [("", root)]
    for path, model in out:
        for key, field in model.model_fields.items():
            sub = _model_of(field.annotation)
            if sub is not None:
                out.append((f"{path}.{key}" if path else key, sub))
    return out


def _settings(model: type[BaseModel]) -> list[str]:
    return [k for k, f in model.model_fields.items() if _model_of(f.annotation) is None]


def _table_at(root: type[BaseModel], loc: tuple) -> tuple[str, type[BaseModel]]:
    path, model = "", root
    for part in loc:
        if isinstance(part, int):
            continue
        field = model.model_fields.get(part)
        sub = _model_of(field.annotation) if field is not None else None
        if sub is None:
            break
        path, model = (f"{path}.{part}" if path else part), sub
    return path, model


def _heading(path: str) -> str:
    return "the top level (before the first [table] heading)" if not path else f"[{path}]"


def unknown_key_hint(root: type[BaseModel], loc: tuple) -> str:
    """Where an unknown key belongs, or which key of this table it may be a misspelling of.

    ``loc`` is the key's location as pydantic reports it, e.g. ``("batch", "seed")``.
    """
    key = str(loc[-1])
    here, model = _table_at(root, loc[:-1])
    elsewhere = [path for path, m in _tables(root) if path != here and key in _settings(m)]
    if elsewhere and len(elsewhere) <= 2:
        where = " or ".join(_heading(p) for p in elsewhere)
        text = f"`{key}` belongs in {where}, not in {_heading(here)}"
        if "" in elsewhere:
            text += ("; in TOML every key after a [table] heading belongs to that table, so write "
                     f"`{key} = ...` above the first heading")
        return text
    close = difflib.get_close_matches(key, _settings(model), n=1, cutoff=0.75)
    return f"did you mean `{close[0]}`?" if close else ""


def choice_hint(root: type[BaseModel], loc: tuple, value) -> str:
    """For a value that is not one of a setting's choices: the choice it most likely means.

    ``EI`` means ``ei`` (the choices are lower case), ``max`` means ``maximize``.
    """
    _, model = _table_at(root, loc[:-1])
    field = model.model_fields.get(str(loc[-1]))
    if field is None or not isinstance(value, str):
        return ""
    choices = [c for c in typing.get_args(field.annotation) if isinstance(c, str)]
    text = value.strip().lower()
    if text in choices:
        return f'; did you mean "{text}"? the choices are written in lower case'
    found = [c for c in choices if text and c.startswith(text)]
    return f'; did you mean "{found[0]}"? write the choice in full' if len(found) == 1 else ""


def quoted_rule(text: str, names) -> str | None:
    """The rule with every factor name that needs backquotes put in them, or None if none does.

    Only text outside backquotes is changed; longer names are quoted first,
    so that a name inside a longer one is not split.
    """
    needing = sorted((n for n in names if not PLAIN_NAME.fullmatch(n)), key=len, reverse=True)
    out = text
    for name in needing:
        parts = re.split(r"(`[^`]*`)", out)
        parts = [p if p.startswith("`") else p.replace(name, f"`{name}`") for p in parts]
        out = "".join(parts)
    return None if out == text else out


def percent_total_hint(low: float, high: float, total: float) -> str:
    """A hint when component bounds that miss ``total`` would fit a total of 100 (percent)."""
    if total == 100.0 or not (low <= 100.0 + 1e-9 and high >= 100.0 - 1e-9):
        return ""
    return "; if the bounds are percentages, set `total = 100` in the [mixture] table"
