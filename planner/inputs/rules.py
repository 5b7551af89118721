"""A small parser for linear rules written over factor names.

Protocols state ratio limits and other linear restrictions as readable
inequalities, for example::

    mcc >= 2 * lactose
    0.5 * binder + disintegrant <= 0.12
    0.02 <= magnesium_stearate + talc <= 0.04
    mcc / lactose <= 3
    `factor with spaces` - other >= 0

The grammar (no ``eval``; a hand-written recursive-descent parser)::

    rule    := expr (CMP expr){1,2}
    expr    := term (("+" | "-") term)*
    term    := unary (("*" | "/") unary)*
    unary   := ("+" | "-") unary | atom
    atom    := NUMBER | NAME | "`" any text "`" | "(" expr ")"
    CMP     := "<=" | ">=" | "<" | ">" | "==" | "="

Every side must be linear in the factors: a product needs one constant
side, a division a constant divisor, except for a ratio standing alone on
one side against a constant (``a / b <= 3``), which is rewritten as
``a - 3 b <= 0``. That rewrite is exact only where the divisor is
non-negative; the returned rule lists the divisors so that the caller can
check them against the factor bounds. Strict comparisons are read as
non-strict ones: for continuous factors the two describe the same closed
design space.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from guardband.planner.settings import MAX_INPUT_MAGNITUDE, MAX_RULE_NESTING

__all__ = ["RuleSyntaxError", "LinearRule", "parse_rule"]


class RuleSyntaxError(ValueError):
    """A rule could not be parsed; ``position`` is a 0-based character offset.

    ``message`` says what is wrong, ``hint`` (possibly empty) how it is
    usually put right; the text of the error is both.
    """

    def __init__(self, message: str, position: int | None = None, hint: str = ""):
        super().__init__(message + (f"; {hint}" if hint else ""))
        self.message = message
        self.hint = hint
        self.position = position


@dataclass(frozen=True)
class _Lin:
    """A linear form sum(coef[name] * name) + const."""

    coefs: tuple[tuple[str, float], ...]
    const: float

    @staticmethod
    def constant(value: float) -> "_Lin":
        return _Lin((), float(value))

    @staticmethod
    def name(name: str) -> "_Lin":
        return _Lin(((name, 1.0),), 0.0)

    @property
    def is_constant(self) -> bool:
        return all(c == 0.0 for _, c in self.coefs)

    def as_dict(self) -> dict[str, float]:
        out: dict[str, float] = {}
        for n, c in self.coefs:
            out[n] = out.get(n, 0.0) + c
        return out

    def add(self, other: "_Lin", sign: float = 1.0) -> "_Lin":
        merged = self.as_dict()
        for n, c in other.coefs:
            merged[n] = merged.get(n, 0.0) + sign * c
        return _Lin(tuple(merged.items()), self.const + sign * other.const)

    def scale(self, k: float) -> "_Lin":
        return _Lin(tuple((n, k * c) for n, c in self.coefs), k * self.const)


@dataclass(frozen=True)
class _Ratio:
    num: _Lin
    den: _Lin


@dataclass(frozen=True)
class LinearRule:
    """One linear rule ``sum(coefs[name] * name) <sense> rhs``.

    Attributes
    ----------
    text : str
        The rule as written.
    coefs : tuple of (name, coefficient)
        Non-zero coefficients, in order of first appearance.
    sense : {"<=", ">=", "=="}
    rhs : float
    divisors : tuple of tuple of (name, coefficient) and constant
        Linear forms that were divided by (ratio rules); each must be
        non-negative over the design space for the rewrite to be exact.
    """

    text: str
    coefs: tuple[tuple[str, float], ...]
    sense: str
    rhs: float
    divisors: tuple[tuple[tuple[tuple[str, float], ...], float], ...] = ()

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(n for n, _ in self.coefs)

    def row(self, names: list[str] | tuple[str, ...]) -> tuple[list[float], float]:
        """Dense coefficient row over ``names`` and the right-hand side."""
        index = {n: i for i, n in enumerate(names)}
        a = [0.0] * len(names)
        for n, c in self.coefs:
            a[index[n]] += c
        return a, self.rhs

    def upper_rows(self, names) -> list[tuple[list[float], float]]:
        """Rows (a, b) meaning ``a @ x <= b``; an equality gives two rows."""
        a, b = self.row(names)
        neg = ([-v for v in a], -b)
        if self.sense == "<=":
            return [(a, b)]
        if self.sense == ">=":
            return [neg]
        return [(a, b), neg]

    def describe(self) -> str:
        """The normalised form, e.g. ``mcc - 2*lactose >= 0``."""
        parts = []
        for i, (n, c) in enumerate(self.coefs):
            sign = "-" if c < 0 else "+"
            mag = abs(c)
            term = n if mag == 1.0 else f"{mag:g}*{n}"
            if i == 0:
                parts.append(("-" if c < 0 else "") + term)
            else:
                parts.append(f"{sign} {term}")
        lhs = " ".join(parts) if parts else "0"
        return f"{lhs} {self.sense} {self.rhs:g}"


_TOKEN = re.compile(
    r"""
    (?P<ws>\s+)
  | (?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)
  | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
  | (?P<quoted>`[^`]*`)
  | (?P<cmp><=|>=|==|<|>|=)
  | (?P<op>[-+*/()])
    """,
    re.VERBOSE,
)


def _tokenize(text: str) -> list[tuple[str, str, int]]:
    tokens = []
    pos = 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None:
            raise RuleSyntaxError(
                f"unexpected character {text[pos]!r} at position {pos + 1}", pos,
                hint="a name with characters other than letters, digits and _ goes in backquotes",
            )
        kind = m.lastgroup
        value = m.group()
        if kind == "quoted":
            value = value[1:-1]
            if not value.strip():
                raise RuleSyntaxError(f"empty quoted name at position {pos + 1}", pos)
            kind = "name"
        if kind != "ws":
            tokens.append((kind, value, pos))
        pos = m.end()
    tokens.append(("end", "", len(text)))
    return tokens


class _Parser:
    def __init__(self, text: str):
        self.text = text
        self.tokens = _tokenize(text)
        self.i = 0
        self.depth = 0  # open parentheses and signs being read; at most MAX_RULE_NESTING

    def peek(self) -> tuple[str, str, int]:
        return self.tokens[self.i]

    def take(self) -> tuple[str, str, int]:
        tok = self.tokens[self.i]
        self.i += 1
        return tok

    def fail(self, message: str, pos: int):
        raise RuleSyntaxError(f"{message} at position {pos + 1}", pos)

    def expr(self):
        left = self.term()
        while self.peek()[0] == "op" and self.peek()[1] in "+-":
            _, op, pos = self.take()
            right = self.term()
            if isinstance(left, _Ratio) or isinstance(right, _Ratio):
                self.fail(
                    "a ratio must stand alone on one side of the comparison "
                    "(write e.g. `a / b <= 3`)",
                    pos,
                )
            left = left.add(right, 1.0 if op == "+" else -1.0)
        return left

    def term(self):
        left = self.unary()
        while self.peek()[0] == "op" and self.peek()[1] in "*/":
            _, op, pos = self.take()
            right = self.unary()
            if isinstance(right, _Ratio):
                self.fail("cannot multiply or divide by a ratio", pos)
            if op == "*":
                if isinstance(left, _Ratio):
                    if not right.is_constant:
                        self.fail("a ratio can only be multiplied by a number", pos)
                    left = _Ratio(left.num.scale(right.const), left.den)
                elif left.is_constant:
                    left = right.scale(left.const)
                elif right.is_constant:
                    left = left.scale(right.const)
                else:
                    self.fail("the product of two factors is not linear", pos)
            else:
                if isinstance(left, _Ratio):
                    if not right.is_constant:
                        self.fail("a ratio can only be divided by a number", pos)
                    if right.const == 0.0:
                        self.fail("division by zero", pos)
                    left = _Ratio(left.num.scale(1.0 / right.const), left.den)
                elif right.is_constant:
                    if right.const == 0.0:
                        self.fail("division by zero", pos)
                    left = left.scale(1.0 / right.const)
                else:
                    left = _Ratio(left, right)
        return left

    def nested(self, read, pos: int):
        """``read()`` one level deeper, refused past MAX_RULE_NESTING levels (no recursion error)."""
        if self.depth >= MAX_RULE_NESTING:
            self.fail(f"parentheses and signs nest deeper than {MAX_RULE_NESTING} levels; "
                      "write the rule more simply", pos)
        self.depth += 1
        try:
            return read()
        finally:
            self.depth -= 1

    def unary(self):
        kind, value, pos = self.peek()
        if kind == "op" and value in "+-":
            self.take()
            inner = self.nested(self.unary, pos)
            if value == "+":
                return inner
            if isinstance(inner, _Ratio):
                return _Ratio(inner.num.scale(-1.0), inner.den)
            return inner.scale(-1.0)
        return self.atom()

    def atom(self):
        kind, value, pos = self.take()
        if kind == "number":
            number = float(value)
            if not abs(number) <= MAX_INPUT_MAGNITUDE:
                self.fail(f"the number {value} is larger in size than the {MAX_INPUT_MAGNITUDE:.0e} "
                          "the tool computes with safely (or not finite); state the rule in other units", pos)
            return _Lin.constant(number)
        if kind == "name":
            return _Lin.name(value.strip())
        if kind == "op" and value == "(":
            inner = self.nested(self.expr, pos)
            k2, v2, p2 = self.take()
            if not (k2 == "op" and v2 == ")"):
                self.fail("expected ')'", p2)
            return inner
        if kind == "end":
            self.fail("the rule ends too early", pos)
        self.fail(f"unexpected {value!r}", pos)


def _compare(text: str, left, sense: str, right) -> LinearRule:
    divisors = []
    if isinstance(left, _Ratio) or isinstance(right, _Ratio):
        if isinstance(left, _Ratio) and isinstance(right, _Ratio):
            raise RuleSyntaxError("a ratio must be compared with a number, not with another ratio")
        ratio, other = (left, right) if isinstance(left, _Ratio) else (right, left)
        if not other.is_constant:
            raise RuleSyntaxError(
                "a ratio must be compared with a number (write e.g. `a / b <= 3`, "
                "or rewrite it as a linear rule such as `a <= 3 * b`)"
            )
        divisors.append((ratio.den.coefs, ratio.den.const))
        # num/den  <cmp>  c   with den >= 0   <=>   num - c*den  <cmp>  0
        scaled = ratio.num.add(ratio.den.scale(other.const), -1.0)
        if ratio is left:
            left, right = scaled, _Lin.constant(0.0)
        else:
            left, right = _Lin.constant(0.0), scaled
    diff = left.add(right, -1.0)  # left - right  <sense>  0
    coefs = tuple((n, c) for n, c in diff.as_dict().items() if c != 0.0)
    if not coefs:
        raise RuleSyntaxError("the rule names no factor (or its factors cancel out)")
    rhs = -diff.const + 0.0  # "+ 0.0" turns -0.0 into 0.0
    for c in (*(c for _, c in coefs), rhs):
        if not abs(c) <= MAX_INPUT_MAGNITUDE:  # also NaN and infinities
            raise RuleSyntaxError(
                f"a coefficient or constant works out to {c:.3g}, beyond the {MAX_INPUT_MAGNITUDE:.0e} the "
                "tool computes with safely; state the rule in other units"
            )
    return LinearRule(text=text, coefs=coefs, sense=sense, rhs=rhs, divisors=tuple(divisors))


_SENSE = {"<=": "<=", "<": "<=", ">=": ">=", ">": ">=", "==": "==", "=": "=="}


def parse_rule(text: str) -> tuple[LinearRule, ...]:
    """Parse a rule; a chained rule (``a <= x + y <= b``) gives two.

    Raises
    ------
    RuleSyntaxError
        With a plain sentence and the position of the problem.
    """
    if not isinstance(text, str) or not text.strip():
        raise RuleSyntaxError("the rule is empty")
    parser = _Parser(text)
    sides = [parser.expr()]
    senses = []
    while parser.peek()[0] == "cmp":
        senses.append(_SENSE[parser.take()[1]])
        sides.append(parser.expr())
    kind, value, pos = parser.peek()
    if kind != "end":
        before = parser.tokens[parser.i - 1] if parser.i else None
        if kind == "name" and before is not None and before[0] == "name":
            raise RuleSyntaxError(
                f"unexpected {value!r} at position {pos + 1}", pos,
                hint=f"a name with a space goes in backquotes: `{text[before[2]:pos + len(value)].strip('`')}`")
        parser.fail(f"unexpected {value!r}", pos)
    if not senses:
        raise RuleSyntaxError("the rule has no comparison (use <=, >= or ==)")
    if len(senses) > 2:
        raise RuleSyntaxError("at most two comparisons may be chained")
    if len(senses) == 2 and (senses[0] != senses[1] or senses[0] == "=="):
        raise RuleSyntaxError("a chained rule must read low <= expr <= high (or high >= expr >= low)")
    return tuple(
        _compare(text, sides[k], senses[k], sides[k + 1]) for k in range(len(senses))
    )
