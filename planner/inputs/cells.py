"""A cell of a runs table as a number, or the reason it is not one.

The number syntax a runs file may use (decimal point or decimal comma, an
exponent), the reasons a text is refused (a thousands separator, a unit in
the cell, a censored value, a decimal mark that is not the file's), and the
largest size the tool computes with. Split from :mod:`.runs`, which reads
and checks the whole table.
"""

from __future__ import annotations

import datetime as _dt
import math
import re

from guardband.planner import settings
from guardband.planner.inputs.workbook import Formula as _Formula
from guardband.planner.inputs.workbook import SheetError as _SheetError

__all__ = ["cell_text", "cell_number", "too_large", "only_a_decimal_comma", "HAS_DOT", "HAS_COMMA"]

_EXP = r"(?:[eE][+-]?[0-9]+)?"
_NUM_DOT = re.compile(rf"^[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+){_EXP}$")
_NUM_COMMA = re.compile(rf"^[+-]?(?:[0-9]+,?[0-9]*|,[0-9]+){_EXP}$")
#: A number with a decimal point.
HAS_DOT = re.compile(rf"^[+-]?(?:[0-9]*\.[0-9]+|[0-9]+\.){_EXP}$")
#: A number with a decimal comma.
HAS_COMMA = re.compile(rf"^[+-]?(?:[0-9]*,[0-9]+|[0-9]+,){_EXP}$")
_GROUPED = re.compile(r"^[+-]?[0-9]{1,3}(?:[.,' \u00a0\u202f][0-9]{3})+(?:[.,][0-9]+)?$")
_WITH_UNIT = re.compile(r"^(?P<num>[+-]?[0-9][0-9.,]*)\s*(?P<unit>[A-Za-zµμ°%‰][^0-9]*)$")
_NOT_FINITE = {"nan", "inf", "-inf", "+inf", "infinity", "-infinity", "+infinity"}


def only_a_decimal_comma(text: str) -> bool:
    """Whether ``text`` is a number whose comma can only be a decimal comma ('0,8696'), not a
    thousands separator ('1,234')."""
    return bool(HAS_COMMA.match(text)) and not _GROUPED.match(text)


def cell_text(value: object) -> str:
    """A cell as text, trimmed; a whole float without its ".0"; "" for an empty cell or an unread formula."""
    if value is None:
        return ""
    if isinstance(value, str):
        return value.strip()
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, float) and value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    if isinstance(value, (_Formula, _SheetError)):
        return ""
    return str(value)


def cell_number(value: object, decimal: str | None) -> tuple[float | None, str | None]:
    """A cell as a number: (value, None), (None, None) when empty, or (None, problem).

    The problem "" means "already reported for the whole file".
    """
    if value is None:
        return None, None
    if isinstance(value, _Formula):
        return None, (
            f"the cell holds a formula ({value.text}) with no saved result; open the workbook in a "
            "spreadsheet program, let it calculate, save it, and try again"
        )
    if isinstance(value, _SheetError):
        return None, f"the cell holds the spreadsheet error {value.code}"
    if isinstance(value, bool):
        return None, f"{'TRUE' if value else 'FALSE'} is a true/false value, not a number"
    if isinstance(value, (_dt.datetime, _dt.date, _dt.time, _dt.timedelta)):
        return None, f"{value} is a date or time, not a number (is the cell formatted as a date?)"
    if isinstance(value, (int, float)):
        v = float(value)
        if not math.isfinite(v):
            return None, f"{value!r} is not a finite number"
        return _in_range(v, repr(value))
    s = str(value).strip()
    if not s:
        return None, None
    v = None
    if decimal == "." and _NUM_DOT.match(s):
        v = float(s)
    elif decimal == "," and _NUM_COMMA.match(s):
        v = float(s.replace(",", "."))
    elif decimal is None:
        if re.fullmatch(rf"[+-]?[0-9]+{_EXP}", s):
            v = float(s)
        elif _NUM_DOT.match(s) or _NUM_COMMA.match(s):
            return None, ""
    if v is None:
        return None, _why_not_number(s, decimal)
    if not math.isfinite(v):  # "1e400" reads as infinity
        return None, f"{s!r} is too large to be a finite number"
    return _in_range(v, repr(s))


def too_large(text: str) -> str:
    """The problem text for a value beyond ``settings.MAX_INPUT_MAGNITUDE``."""
    return (f"{text} is larger in size than the {settings.MAX_INPUT_MAGNITUDE:.0e} the tool computes with "
            "safely; state the column's unit in the header (e.g. 'name [mg]') or rescale it")


def _in_range(v: float, text: str) -> tuple[float | None, str | None]:
    if abs(v) > settings.MAX_INPUT_MAGNITUDE:
        return None, too_large(text)
    return v, None


def _why_not_number(s: str, decimal: str | None) -> str:
    low = s.lower()
    if low in _NOT_FINITE:
        return f"{s!r} is not a finite number"
    if s[0] in "<>≤≥":
        return (
            f"{s!r} is a censored value (below or above a reporting limit), not a measurement; "
            "the tool cannot use it: enter a number or leave the cell empty"
        )
    if _GROUPED.match(s) and ("." in s and "," in s or re.search(r"[' \u00a0\u202f]", s)):
        return f"{s!r} looks like a number with thousands separators; write it without them"
    if decimal == "." and HAS_COMMA.match(s) or decimal == "." and _GROUPED.match(s):
        return (
            f"{s!r} has a comma: a decimal comma or a thousands separator? write it with a "
            "decimal point, or state the decimal mark (--decimal ,)"
        )
    if decimal == "," and (HAS_DOT.match(s) or _GROUPED.match(s)):
        return f"{s!r} has a decimal point, but this file's decimal mark is ','"
    m = _WITH_UNIT.match(s)
    if m:
        return (
            f"{s!r} holds a unit or symbol; write the number only and state the unit in the header "
            f"(e.g. 'name [{m.group('unit').strip()}]')"
        )
    return f"{s!r} is not a number"
