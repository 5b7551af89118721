"""A small parser for the formulas of a scenario's true responses.

A scenario states each response as a formula over the protocol's factor
names, for example::

    100 * (1 - exp(-(0.3 + 8 * croscarmellose - 2 * povidone)))
    logistic(-3.8 + 0.05 * dose_a + 0.35 * dose_b)
    max(0, 0.03 + 2 * povidone ^ 2) + abs(force - 12) / 100

The grammar (no ``eval``: a hand-written recursive-descent parser into a
tree that numpy evaluates, vectorised over runs)::

    formula := sum
    sum     := product (("+" | "-") product)*
    product := unary (("*" | "/") unary)*
    unary   := ("+" | "-") unary | power
    power   := atom ("^" unary)?          right-associative: 2^3^2 = 2^9;
                                          -2^2 = -(2^2), as in mathematics
    atom    := NUMBER | NAME | "`" any text "`" | FUNCTION "(" sum ("," sum)* ")"
             | "(" sum ")"
    FUNCTION: exp, log (natural), sqrt, abs, logistic (1 / (1 + exp(-x))),
              one argument each; min and max, two or more

Every other character or token is refused with its position (1-based, as a
reader counts). A formula is at most :data:`MAX_LENGTH` characters and
nests at most :data:`MAX_DEPTH` levels (parentheses, function calls, signs
and powers), so that neither the parser nor the evaluation can exhaust
the stack. Values outside a function's domain (log of 0, sqrt of a negative
number, 0/0) come out as inf or NaN; the caller checks them.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

__all__ = ["FormulaError", "Formula", "parse_formula", "FUNCTIONS", "MAX_LENGTH", "MAX_DEPTH"]

#: Longest formula accepted, in characters.
MAX_LENGTH = 2000
#: Deepest nesting accepted (parentheses, calls, unary signs, powers).
MAX_DEPTH = 40


def _logistic(x):
    # 1 / (1 + exp(-x)) without overflow warnings for large |x|
    return np.exp(-np.logaddexp(0.0, -x))


#: Function name -> (numpy function, least arguments, most arguments or None).
FUNCTIONS = {
    "exp": (np.exp, 1, 1),
    "log": (np.log, 1, 1),
    "sqrt": (np.sqrt, 1, 1),
    "abs": (np.abs, 1, 1),
    "logistic": (_logistic, 1, 1),
    "min": (np.minimum.reduce, 2, None),
    "max": (np.maximum.reduce, 2, None),
}


class FormulaError(ValueError):
    """A formula could not be read; ``position`` is a 1-based character position (None: the whole text)."""

    def __init__(self, message: str, position: int | None = None):
        super().__init__(message)
        self.position = position


_TOKEN = re.compile(
    r"""
    (?P<ws>[ \t\r\n]+)
  | (?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)
  | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
  | (?P<quoted>`[^`\x00-\x1f]*`)
  | (?P<op>[-+*/^(),])
    """,
    re.VERBOSE,
)


def _tokenize(text: str) -> list[tuple[str, str, int]]:
    """(kind, text, 1-based position) of every token, ending with ("end", "", len + 1)."""
    tokens, pos = [], 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None:
            raise FormulaError(f"unexpected character {text[pos]!r} at position {pos + 1}", pos + 1)
        kind, value = m.lastgroup, m.group()
        if kind == "quoted":
            value, kind = value[1:-1], "name"
            if not value.strip():
                raise FormulaError(f"empty quoted name at position {pos + 1}", pos + 1)
        if kind == "number" and m.end() < len(text) and (text[m.end()].isalpha() or text[m.end()] == "_"):
            raise FormulaError(f"a number runs into a name at position {m.end() + 1} "
                               "(write a * between them)", m.end() + 1)
        if kind != "ws":
            tokens.append((kind, value, pos + 1))
        pos = m.end()
    tokens.append(("end", "", len(text) + 1))
    return tokens


# Tree nodes: ("num", value) | ("name", name, position) | ("neg", node)
# | ("sum", ((sign, node), ...)) with sign + or - | ("product", ((op, node), ...)) with op * or /
# | ("^", base, exponent) | ("call", function, (args...)).


class _Parser:
    def __init__(self, text: str):
        self.tokens = _tokenize(text)
        self.i = 0
        self.depth = 0

    def peek(self):
        return self.tokens[self.i]

    def take(self):
        tok = self.tokens[self.i]
        self.i += 1
        return tok

    def deeper(self, pos: int) -> None:
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise FormulaError(f"the formula nests deeper than {MAX_DEPTH} levels at position {pos}", pos)

    def expect(self, value: str, what: str):
        kind, text, pos = self.take()
        if kind != "op" or text != value:
            found = "the end of the formula" if kind == "end" else repr(text)
            raise FormulaError(f"expected {what} at position {pos}, found {found}", pos)

    def sum(self):
        # n-ary, so that a long sum is a flat list rather than a deep tree
        terms = [("+", self.product())]
        while self.peek()[1] in ("+", "-") and self.peek()[0] == "op":
            op = self.take()[1]
            terms.append((op, self.product()))
        return terms[0][1] if len(terms) == 1 else ("sum", tuple(terms))

    def product(self):
        factors = [("*", self.unary())]
        while self.peek()[1] in ("*", "/") and self.peek()[0] == "op":
            op = self.take()[1]
            factors.append((op, self.unary()))
        return factors[0][1] if len(factors) == 1 else ("product", tuple(factors))

    def unary(self):
        kind, text, pos = self.peek()
        if kind == "op" and text in ("+", "-"):
            self.take()
            self.deeper(pos)
            inner = self.unary()
            self.depth -= 1
            return ("neg", inner) if text == "-" else inner
        return self.power()

    def power(self):
        base = self.atom()
        kind, text, pos = self.peek()
        if kind == "op" and text == "^":
            self.take()
            self.deeper(pos)
            exponent = self.unary()
            self.depth -= 1
            return ("^", base, exponent)
        return base

    def atom(self):
        kind, text, pos = self.take()
        if kind == "number":
            value = float(text)
            if not np.isfinite(value):
                raise FormulaError(f"number {text!r} at position {pos} is too large", pos)
            return ("num", value)
        if kind == "name":
            if self.peek()[1] == "(" and self.peek()[0] == "op":
                return self.call(text, pos)
            if text in FUNCTIONS:
                raise FormulaError(f"function {text!r} at position {pos} needs its argument in parentheses", pos)
            return ("name", text, pos)
        if kind == "op" and text == "(":
            self.deeper(pos)
            node = self.sum()
            self.expect(")", "')'")
            self.depth -= 1
            return node
        found = "the end of the formula" if kind == "end" else repr(text)
        raise FormulaError(f"expected a number, a factor name, a function or '(' at position {pos}, "
                           f"found {found}", pos)

    def call(self, name: str, pos: int):
        if name not in FUNCTIONS:
            raise FormulaError(f"unknown function {name!r} at position {pos}; functions: "
                               f"{', '.join(sorted(FUNCTIONS))}", pos)
        self.take()  # "("
        self.deeper(pos)
        args = [self.sum()]
        while self.peek()[1] == "," and self.peek()[0] == "op":
            self.take()
            args.append(self.sum())
        self.expect(")", "')' or ','")
        self.depth -= 1
        _, least, most = FUNCTIONS[name]
        if len(args) < least or (most is not None and len(args) > most):
            want = f"{least}" if least == most else f"at least {least}"
            raise FormulaError(f"function {name!r} at position {pos} takes {want} argument(s), "
                               f"got {len(args)}", pos)
        return ("call", name, tuple(args))


def _names(node) -> list[tuple[str, int]]:
    kind = node[0]
    if kind == "name":
        return [(node[1], node[2])]
    if kind == "num":
        return []
    if kind == "neg":
        return _names(node[1])
    if kind == "call":
        return [n for a in node[2] for n in _names(a)]
    if kind in ("sum", "product"):
        return [n for _, a in node[1] for n in _names(a)]
    return _names(node[1]) + _names(node[2])


def _evaluate(node, columns: dict):
    kind = node[0]
    if kind == "num":
        return node[1]
    if kind == "name":
        return columns[node[1]]
    if kind == "neg":
        return -_evaluate(node[1], columns)
    if kind == "call":
        fn = FUNCTIONS[node[1]][0]
        args = [_evaluate(a, columns) for a in node[2]]
        return fn(args[0]) if len(args) == 1 else fn(np.broadcast_arrays(*args))
    if kind == "sum":
        total = 0.0
        for sign, a in node[1]:
            total = total + _evaluate(a, columns) if sign == "+" else total - _evaluate(a, columns)
        return total
    if kind == "product":
        total = 1.0
        for op, a in node[1]:
            total = total * _evaluate(a, columns) if op == "*" else np.divide(total, _evaluate(a, columns))
        return total
    return np.power(_evaluate(node[1], columns), _evaluate(node[2], columns))


@dataclass(frozen=True)
class Formula:
    """A parsed formula: evaluate it on runs with :meth:`__call__`.

    Attributes
    ----------
    text : str
        As written.
    tree : tuple
        The parsed tree (see the module's grammar).
    names : tuple of str
        The factor names it uses, in order of first appearance.
    """

    text: str
    tree: tuple
    names: tuple[str, ...]

    def __call__(self, columns: dict) -> np.ndarray:
        """The formula's value for every run.

        Parameters
        ----------
        columns : dict of str to array of shape (n,)
            One column per name the formula uses.

        Returns
        -------
        ndarray of shape (n,)
            Inf or NaN where a function leaves its domain (no warning).
        """
        n = len(next(iter(columns.values()))) if columns else 1
        with np.errstate(all="ignore"):
            value = _evaluate(self.tree, {k: np.asarray(v, dtype=float) for k, v in columns.items()})
        return np.broadcast_to(np.asarray(value, dtype=float), (n,)).copy()


def parse_formula(text: str, names=None) -> Formula:
    """Read a formula.

    Parameters
    ----------
    text : str
    names : iterable of str, optional
        The names it may use (the protocol's factors); any other name is
        refused with its position.

    Returns
    -------
    Formula

    Raises
    ------
    FormulaError
        With the position (1-based) of the first token that cannot be read.
    """
    if not isinstance(text, str):
        raise FormulaError("a formula must be text")
    if len(text) > MAX_LENGTH:
        raise FormulaError(f"the formula is {len(text)} characters long; at most {MAX_LENGTH} are read")
    if not text.strip():
        raise FormulaError("the formula is empty")
    parser = _Parser(text)
    tree = parser.sum()
    kind, value, pos = parser.peek()
    if kind != "end":
        raise FormulaError(f"unexpected {value!r} at position {pos}", pos)
    used = _names(tree)
    if names is not None:
        known = set(names)
        for name, p in used:
            if name not in known:
                raise FormulaError(f"unknown name {name!r} at position {p}; factors: "
                                   f"{', '.join(sorted(known))}", p)
    return Formula(text, tree, tuple(dict.fromkeys(n for n, _ in used)))
