"""Canonical JSON (RFC 8785, JSON Canonicalization Scheme).

The decision log hashes records in this form, so these bytes must never
change: a change would break the hash of every existing log.

:func:`canonical_json` writes object keys sorted by their UTF-16 code
units, no whitespace, UTF-8 text with only the escapes JSON requires, and
numbers written the way ECMAScript writes a double (``1e+21``,
``0.000001``, ``100`` for ``100.0``, ``0`` for ``-0.0``). Two deliberate
differences from RFC 8785: integers are written exactly however large they
are (RFC 8785 reads every number as a double, so an integer beyond 2**53
would be rounded there), and NaN and infinity are refused rather than
silently written as ``null``.

One consequence of the ECMAScript number form: a float with an integral
value is written without a decimal point (``2.0`` -> ``2``,
``1e16`` -> ``10000000000000000``), so :func:`json.loads` reads it back as
an ``int``. ``float()`` of that int is the same double again, and the
canonical text (hence every hash) is unchanged by the round trip.

:func:`to_jsonable` turns numpy values, dataclasses and objects with a
``to_dict()`` method into plain JSON types first, naming the path of
anything JSON cannot hold.

Why not the ``rfc8785`` package
-------------------------------
The design prefers the maintained ``rfc8785`` package (PyPI) where it gives
the same bytes. Version 0.1.4 was checked against this module: it gives the
same bytes on the RFC's vectors in ``tests/test_canonical.py`` (the 3.2.2
example, the 3.2.3 key order, every Appendix B number), on the golden record
bodies of ``tests/test_golden.py`` and on 20,000 random JSON values with
integers inside +-(2**53 - 1). It differs on one case those tests cover: an
integer outside +-(2**53 - 1) (``2**64 + 1``, ``np.uint64(2**63)``, ``10**16``
in a record body). ``rfc8785`` refuses it (``IntegerDomainError``) where this
module writes its exact digits. A seed drawn for a plan is below 2**63 and
so almost always beyond 2**53, and it is recorded in the log: with the
package, such a plan could not be logged. So the writer stays our own.
"""

from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Mapping
from decimal import Decimal
from json.encoder import encode_basestring as canonical_string  # C; keeps non-ASCII as is
from typing import Any

import numpy as np

__all__ = [
    "to_jsonable",
    "canonical_json",
    "canonical_string",
    "write_canonical",
]

_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")


def _child(path: str, key: str) -> str:
    return f"{path}.{key}" if _IDENTIFIER.match(key) else f"{path}[{key!r}]"


def to_jsonable(obj: Any, *, path: str = "$") -> Any:
    """Convert a value to plain JSON types, refusing what JSON cannot hold.

    Parameters
    ----------
    obj : object
        ``None``, bool, int, float, str, mappings with str keys, lists,
        tuples, numpy scalars and arrays, dataclass instances, or objects
        with a ``to_dict()`` method, nested in any way.
    path : str, default "$"
        Where ``obj`` sits, used in error messages (``$.body.runs[2]``).

    Returns
    -------
    object
        A new structure of ``dict``, ``list``, ``str``, ``int``, ``float``,
        ``bool`` and ``None``; the input is not changed.

    Raises
    ------
    ValueError
        A NaN or infinite number, or text that is not valid Unicode (a lone
        surrogate). The message names the path.
    TypeError
        A key that is not text, or a value of a type JSON cannot hold.
    """
    if obj is None or isinstance(obj, bool):
        return obj
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, str):
        try:
            obj.encode("utf-8")
        except UnicodeEncodeError as exc:
            raise ValueError(
                f"{path} holds text that is not valid Unicode ({exc.reason} at "
                f"position {exc.start}); it cannot be written as UTF-8"
            ) from None
        return str(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        if not math.isfinite(value):
            raise ValueError(
                f"{path} is {value!r}: JSON has no NaN or infinity; "
                "record a missing value as None"
            )
        return value
    if isinstance(obj, Mapping):
        out: dict[str, Any] = {}
        for key, value in obj.items():
            if not isinstance(key, str):
                raise TypeError(
                    f"{path} has a key {key!r} of type {type(key).__name__}: "
                    "JSON object keys must be text"
                )
            out[str(key)] = to_jsonable(value, path=_child(path, key))
        return out
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist(), path=path)
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(value, path=f"{path}[{i}]") for i, value in enumerate(obj)]
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        fields = {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)}
        return to_jsonable(fields, path=path)
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict):
        return to_jsonable(to_dict(), path=path)
    raise TypeError(
        f"{path} is of type {type(obj).__name__}, which cannot be written to JSON; "
        "convert it to text, a number, a list or a dict first"
    )


def _format_number_general(value: float) -> str:
    """Write a finite double as ECMAScript's Number::toString does.

    ``repr`` gives the shortest digit string that reads back as the same
    double (the digits ECMAScript also requires); only the layout differs.
    ECMA-262, 7.1.12.1 (Number::toString), as used by RFC 8785, 3.2.2.3.
    """
    if value == 0.0:
        return "0"  # also -0.0
    if value < 0.0:
        return "-" + _format_number_general(-value)
    _, digit_tuple, exponent = Decimal(repr(value)).as_tuple()
    digits = "".join(map(str, digit_tuple)).rstrip("0")
    exponent += len(digit_tuple) - len(digits)
    k = len(digits)  # value = digits * 10**(n - k)
    n = exponent + k
    if k <= n <= 21:
        return digits + "0" * (n - k)
    if 0 < n <= 21:
        return digits[:n] + "." + digits[n:]
    if -6 < n <= 0:
        return "0." + "0" * (-n) + digits
    mantissa = digits if k == 1 else digits[0] + "." + digits[1:]
    e = n - 1
    return f"{mantissa}e{'+' if e >= 0 else '-'}{abs(e)}"


def _format_number(value: float) -> str:
    """ECMAScript text of a finite double, with a fast path for common values."""
    text = repr(value)
    if "e" not in text:
        # repr is in fixed notation for 1e-4 <= |value| < 1e16, where
        # ECMAScript also uses fixed notation with the same digits; it only
        # drops the ".0" of an integral value.
        if text.endswith(".0"):
            text = text[:-2]
        return "0" if text == "-0" else text
    return _format_number_general(value)


def _sorted_keys(obj: dict[str, Any]) -> list[str]:
    keys = list(obj)
    if all(key.isascii() for key in keys):
        return sorted(keys)  # code-point order is UTF-16 order here
    # Big-endian UTF-16 bytes compare in the same order as UTF-16 code units.
    return sorted(keys, key=lambda key: key.encode("utf-16-be", "surrogatepass"))


def write_canonical(value: Any, parts: list[str]) -> None:
    """Append the canonical text of plain JSON data to ``parts``.

    Parameters
    ----------
    value : object
        Plain JSON data of exact types (``dict``, ``list``, ``str``, ``int``,
        ``float``, ``bool``, ``None``), as :func:`to_jsonable` or
        :func:`json.loads` give it; nothing is checked or converted.
    parts : list of str
        Text pieces; ``"".join(parts)`` is the canonical text.
    """
    kind = type(value)
    if kind is str:
        # The escapes match ECMAScript's JSON.stringify for valid text:
        # \" \\ \b \f \n \r \t, other controls as \u00xx, nothing else.
        parts.append(canonical_string(value))
    elif kind is float:
        parts.append(_format_number(value))
    elif kind is int:
        parts.append(int.__repr__(value))
    elif kind is dict:
        parts.append("{")
        first = True
        for key in _sorted_keys(value):
            if not first:
                parts.append(",")
            first = False
            parts.append(canonical_string(key))
            parts.append(":")
            write_canonical(value[key], parts)
        parts.append("}")
    elif kind is list:
        parts.append("[")
        first = True
        for item in value:
            if not first:
                parts.append(",")
            first = False
            write_canonical(item, parts)
        parts.append("]")
    elif value is None:
        parts.append("null")
    elif value is True:
        parts.append("true")
    elif value is False:
        parts.append("false")
    else:  # pragma: no cover - to_jsonable and json.loads give nothing else
        raise TypeError(f"unexpected {kind.__name__} in canonical JSON")


def canonical_json(obj: Any) -> bytes:
    """Canonical JSON bytes of ``obj`` (RFC 8785, see the module notes).

    Parameters
    ----------
    obj : object
        Anything :func:`to_jsonable` accepts.

    Returns
    -------
    bytes
        UTF-8 JSON text: keys sorted, separators ``,`` and ``:``, no
        whitespace, numbers in ECMAScript form.

    Raises
    ------
    ValueError
        NaN or infinity somewhere in ``obj``; the message gives its path.
    TypeError
        A value JSON cannot hold.
    """
    parts: list[str] = []
    write_canonical(to_jsonable(obj), parts)
    return "".join(parts).encode("utf-8")
