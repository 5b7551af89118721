"""The protocol's rules checked against its factors, once the protocol is validated.

Every rule in ``[[constraints]]``, ``[[screen.forbidden]]`` and ``[start]``
must read, name only known factors and never divide by a quantity that can
be negative within the factor bounds; a factor name that needs backquotes
is hinted. Split from :mod:`.protocol`, whose :func:`parse_protocol` calls
:func:`check_rules`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.hints import quoted_rule
from guardband.planner.inputs.rules import RuleSyntaxError, parse_rule

if TYPE_CHECKING:
    from guardband.planner.inputs.protocol import Protocol

__all__ = ["check_rules"]


def check_rules(protocol: Protocol, source: str) -> None:
    """Refuse, naming ``source`` and the field, a rule that does not read, names an unknown factor or
    divides by a quantity that can be negative.

    Raises
    ------
    ProtocolError
    """
    names = set(protocol.factor_names)
    factor = {f.name: f for f in protocol.factors}
    for path, holder, attr in _rule_fields(protocol):
        try:
            rules = getattr(holder, attr)
        except RuleSyntaxError as exc:
            hint = _quoting_hint(holder, names)
            raise ProtocolError(f"{source}: {path}: cannot read the rule: "
                                + (f"{exc.message}; {hint}" if hint else str(exc))) from None
        for rule in rules:
            unknown = [n for n in rule.names if n not in names]
            if unknown:
                hint = _quoting_hint(holder, names)
                raise ProtocolError(
                    f"{source}: {path}: rule {rule.text!r} names unknown factor(s) "
                    f"{', '.join(repr(u) for u in unknown)}; "
                    + (hint if hint else f"known factors: {', '.join(sorted(names))}")
                )
            for coefs, const in rule.divisors:
                low = const + sum(
                    min(c * factor[n].low, c * factor[n].high) for n, c in coefs
                )
                if low < 0:
                    raise ProtocolError(
                        f"{source}: {path}: rule {rule.text!r} divides by a quantity that can be "
                        f"negative within the factor bounds (as low as {low:g}); write the rule "
                        "without division"
                    )


def _rule_fields(p: Protocol):
    """(field path, the table holding the rule(s), the attribute that parses them) for every rule."""
    for k, c in enumerate(p.constraints):
        yield f"constraints[{k}].rule", c, "parsed"
    for k, f in enumerate(p.screen.forbidden):
        yield f"screen.forbidden[{k}].rules", f, "parsed"
    if p.start is not None:
        yield "start.rules", p.start, "parsed"


def _quoting_hint(holder, names) -> str:
    """The rules of ``holder`` with the factor names that need backquotes quoted, if that reads."""
    texts = holder.rules if hasattr(holder, "rules") else (holder.rule,)  # a Rule holds one
    suggested = [quoted_rule(t, names) or t for t in texts]
    if suggested == list(texts):
        return ""
    try:
        read = [r for t in suggested for r in parse_rule(t)]
    except RuleSyntaxError:
        return ""
    if any(n not in names for r in read for n in r.names):
        return ""
    shown = "; ".join(f'"{t}"' for t, old in zip(suggested, texts) if t != old)
    return f"a factor name with a space or sign goes in backquotes: write {shown}"
