"""Units of factors and responses: convert where it is safe, refuse where it is not.

A protocol gives each factor, the objective and each limit a unit as text
(``unit = "kN"``). A runs file may state a column's unit in its header
(``force [N]``); the values are then converted to the protocol's unit, or
the column is refused. The rules, in order:

1. The same text (spaces aside) is always accepted, unchanged. A unit
   the unit library does not know (``"% released"``, ``"fraction"``,
   ``"score"``, ``"% of label"``) is an opaque *label*: it matches only
   itself and is never converted.
2. Units the library (pint) knows are converted when they measure the
   same kind of quantity: ``mg`` to ``g``, ``N`` to ``kN``, ``degF`` to
   ``degC``, ``percent`` to ``ppm``.
3. A different dimension is refused: ``mg`` (mass) where ``mL`` (volume)
   is expected, ``mg`` where ``mg/kg`` is expected.
4. Ratios that the library would reduce to plain numbers are kept apart
   unless they are ratios of the same thing: ``mg/kg`` and ``ug/g`` (mass
   per mass) convert into each other, but not into ``%`` or ``ppm``
   (which do not say per what), nor ``mL/L``. A count, an absorbance or an
   angle converts only into a unit of its own kind.
5. A text in which units cancel (``w/w``, ``% v/v``) is a label, not
   the plain number the library would make of it: ``% w/w`` and ``% v/v``
   are different quantities.

pint parses unit text with its own tokenizer (no ``eval``); to keep a
hostile header from asking it for huge powers, text with anything but
unit words, ``* / · ^ ( )``, spaces, superscripts and one- or two-digit
exponents is treated as a label without being parsed.
"""

from __future__ import annotations

import functools
import math
import re
from dataclasses import dataclass

import numpy as np

from guardband.planner.errors import RunsDataError

__all__ = ["UnitReading", "Conversion", "UnitError", "read_unit", "conversion", "SIGNIFICANT_DIGITS"]

#: Converted values are rounded to this many significant digits, so that a
#: conversion factor's binary noise (250 mg -> 0.25000000000000006 g) does
#: not reach the models; no laboratory measurement carries more digits.
SIGNIFICANT_DIGITS = 12

_MAX_UNIT_TEXT = 60
_SUPERSCRIPTS = "⁰¹²³⁴⁵⁶⁷⁸⁹⁻"
_WORD = re.compile(rf"%|‰|°?(?![{_SUPERSCRIPTS}])[^\W\d_]\w*")
_ALLOWED_REST = re.compile(rf"^[\s*/·()^\-0-9{_SUPERSCRIPTS}]*$")
_LONG_NUMBER = re.compile(r"\d{3,}")
_OPERATOR_WORDS = {"per"}
#: pure numbers: one may be converted into another by a factor
_RATIO_UNITS = {"dimensionless", "percent", "permille", "ppm", "ppb", "ppt"}
_ANGLE_UNITS = {"radian", "degree", "arcminute", "arcsecond", "turn", "gradian", "milliradian",
                "microradian", "steradian"}
#: base dimensions whose ratio (mass per mass, ...) pint would hide as a plain number
_HIDDEN_RATIOS = {"[mass]": "mass per mass", "[length] ** 3": "volume per volume",
                  "[substance]": "amount per amount"}


class UnitError(RunsDataError):
    """A unit stated with data cannot be converted to the protocol's unit."""


@functools.lru_cache(maxsize=1)
def _registry():
    # Building the registry takes most of a second; it is built only when a
    # header states a unit whose text differs from the protocol's.
    import pint

    return pint.UnitRegistry()


def _normal(text: str) -> str:
    return " ".join(str(text).split())


@dataclass(frozen=True)
class UnitReading:
    """How a unit text is understood.

    Attributes
    ----------
    text : str
        The text, spaces collapsed.
    kind : {"none", "label", "unit"}
        No unit given, an opaque label, or a unit the library knows.
    reading : str
        The library's name for it (``"kilonewton"``), or the text.
    dimension : str
        The library's dimension (``"[mass]"``, ``"dimensionless"``), or "".
    ratio : str
        For a hidden ratio, what per what (``"mass per mass"``), else "".
    """

    text: str
    kind: str
    reading: str
    dimension: str = ""
    ratio: str = ""
    _signature: tuple = ()

    def describe(self) -> str:
        """A short phrase for messages: ``[kN] (kilonewton, [length] * [mass] / [time] ** 2)``."""
        if self.kind == "none":
            return "no unit"
        if self.kind == "label":
            return f"[{self.text}] (a label, not a unit the tool can convert)"
        what = self.ratio or self.dimension
        return f"[{self.text}] ({self.reading}, {what})"


def _label(text: str) -> UnitReading:
    return UnitReading(text=text, kind="label", reading=text)


def _safe_to_parse(text: str) -> bool:
    if len(text) > _MAX_UNIT_TEXT:
        return False
    rest = _WORD.sub(" ", text)
    return bool(_ALLOWED_REST.match(rest)) and not _LONG_NUMBER.search(rest) and "^(" not in rest.replace(" ", "")


@functools.lru_cache(maxsize=256)
def read_unit(text: str) -> UnitReading:
    """Read a unit text.

    Parameters
    ----------
    text : str
        As written in a protocol or a header; ``""`` means no unit.

    Returns
    -------
    UnitReading
    """
    text = _normal(text)
    if not text:
        return UnitReading(text="", kind="none", reading="")
    if not _safe_to_parse(text):
        return _label(text)
    from pint.util import to_units_container

    ureg = _registry()
    words = {w for w in _WORD.findall(text) if w not in _OPERATOR_WORDS}
    try:
        unit = ureg.parse_units(text)
        for w in words:  # every word on its own must be a unit, too
            ureg.parse_units(w)
    except Exception:  # pint raises several types for text it cannot read
        return _label(text)
    container = to_units_container(unit)
    if len(container) < len(words):
        return _label(text)  # units cancel (w/w): a label, not a plain number
    dims = unit.dimensionality
    kinds: list[tuple[str, float]] = []
    signs: dict[str, set[int]] = {}
    for name, exp in sorted(container.items()):
        u = ureg.Unit(name)
        if u.dimensionless:
            if name in _ANGLE_UNITS:
                kinds.append(("angle", exp))
            elif name not in _RATIO_UNITS:
                kinds.append((name, exp))
            continue
        key = str(u.dimensionality)
        if key in _HIDDEN_RATIOS:
            signs.setdefault(key, set()).add(1 if exp > 0 else -1)
    ratios = sorted(_HIDDEN_RATIOS[k] for k, s in signs.items() if s == {1, -1})
    dim_text = "dimensionless" if dims == ureg.dimensionless.dimensionality else str(dims)
    merged: dict[str, float] = {}
    for k, e in kinds:
        merged[k] = merged.get(k, 0.0) + e
    # compare dimensions as sorted (base, exponent) pairs: their text depends on
    # the order pint meets them ("[length] * [mass]" for lbf, "[mass] * [length]" for N)
    dim_key = tuple(sorted((str(k), float(e)) for k, e in dict(dims).items()))
    signature = (dim_key, tuple(ratios), tuple(sorted((k, e) for k, e in merged.items() if e)))
    return UnitReading(
        text=text,
        kind="unit",
        reading=str(unit) or "dimensionless",
        dimension=dim_text,
        ratio=", ".join(ratios),
        _signature=signature,
    )


def _round(values: np.ndarray) -> np.ndarray:
    """Each value to SIGNIFICANT_DIGITS significant digits (decimal text, so no scale factor can overflow)."""
    out = np.array(values, dtype=float, copy=True)
    finite = np.isfinite(out) & (out != 0)
    out[finite] = [float(f"{v:.{SIGNIFICANT_DIGITS}g}") for v in out[finite]]
    return out


@dataclass(frozen=True)
class Conversion:
    """A checked conversion from a stated unit to the protocol's unit."""

    source: str
    target: str
    identity: bool
    source_reading: str = ""
    target_reading: str = ""

    def apply(self, values) -> np.ndarray:
        """Convert values; the caller's array is not changed.

        Parameters
        ----------
        values : array_like of shape (n,)
            In the source unit; NaN passes through.

        Returns
        -------
        ndarray of shape (n,)
            In the target unit, rounded to :data:`SIGNIFICANT_DIGITS`.
        """
        values = np.array(values, dtype=float, copy=True)
        if self.identity:
            return values
        ureg = _registry()
        q = ureg.Quantity(values, ureg.parse_units(self.source))
        return _round(np.asarray(q.to(ureg.parse_units(self.target)).magnitude, dtype=float))

    def describe(self) -> str:
        """``"[mg] -> [g] (x 0.001)"``, or ``"[degF] -> [degC]"`` for an offset scale."""
        if self.identity:
            return f"[{self.source}] (unchanged)"
        zero, one = self.apply(np.array([0.0, 1.0]))
        if abs(zero) < 1e-300:
            return f"[{self.source}] -> [{self.target}] (x {one:.12g})"
        return f"[{self.source}] -> [{self.target}] ({self.source_reading} to {self.target_reading})"


def _what(r: UnitReading) -> str:
    if r.ratio:
        return f"{r.reading}: {r.ratio}"
    if r._signature[2]:
        return r.reading
    if r.dimension == "dimensionless":
        return f"{r.reading}: a plain number, per what is not said"
    return f"{r.reading}: {r.dimension}"


def conversion(source: str, target: str) -> Conversion:
    """Check that values stated in ``source`` may be converted to ``target``.

    Parameters
    ----------
    source : str
        The unit stated with the data (a runs-file header).
    target : str
        The protocol's unit.

    Returns
    -------
    Conversion

    Raises
    ------
    UnitError
        With a sentence saying why not; the caller adds where.
    """
    src_text, dst_text = _normal(source), _normal(target)
    if src_text == dst_text:
        return Conversion(src_text, dst_text, identity=True)
    if not dst_text:
        raise UnitError(
            "the protocol gives no unit for it, so a stated unit cannot be checked; remove the "
            f"unit from the header or give the protocol a unit (unit = \"{src_text}\")"
        )
    src, dst = read_unit(src_text), read_unit(dst_text)
    if dst.kind == "label":
        raise UnitError(
            f"the protocol's unit is a label the tool does not convert; the header must state "
            f"exactly [{dst_text}], or no unit (then the values are taken as [{dst_text}])"
        )
    if src.kind == "label":
        raise UnitError(
            f"[{src_text}] is not a unit the tool knows (the protocol's unit reads as "
            f"{dst.reading}); state [{dst_text}] and convert the values, or fix the header"
        )
    if src._signature[0] != dst._signature[0]:
        raise UnitError(
            f"[{src_text}] reads as {src.reading} ({src.ratio or src.dimension}) and the protocol's "
            f"[{dst_text}] as {dst.reading} ({dst.ratio or dst.dimension}): different kinds of "
            "quantity, which are never converted"
        )
    if src._signature != dst._signature:
        raise UnitError(
            f"[{src_text}] ({_what(src)}) and the protocol's [{dst_text}] ({_what(dst)}) measure "
            "different things, although the unit library would convert one into the other; the "
            f"tool does not guess: state [{dst_text}] and convert the values yourself"
        )
    conv = Conversion(src_text, dst_text, identity=False, source_reading=src.reading,
                      target_reading=dst.reading)
    try:
        check = conv.apply(np.array([0.0, 1.0]))
    except Exception as exc:  # pint: offset or logarithmic units in a compound
        raise UnitError(
            f"[{src_text}] cannot be converted safely to [{dst_text}] ({type(exc).__name__}); "
            f"state [{dst_text}] and convert the values yourself"
        ) from None
    if not all(math.isfinite(v) for v in check):
        raise UnitError(f"[{src_text}] cannot be converted to [{dst_text}]")
    return conv
