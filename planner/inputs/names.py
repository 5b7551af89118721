"""Names and run ids as people read them: one spelling per name that prints alike.

Factor and response names and run ids are normalised to Unicode NFC (a
composed and a decomposed accent are the same name) and refused when they
hold a character that does not print or that changes the direction of the
text around it (zero-width joiners and spaces, left-to-right and
right-to-left marks and overrides, controls). Two names that are equal once
compatibility forms are folded and case is ignored (``Force`` and
``force``, a no-break space and a space) are reported as a collision by
the caller, with :func:`name_key`.
"""

from __future__ import annotations

import unicodedata

__all__ = ["normal_text", "hidden_characters", "check_visible", "name_key", "shown"]


def normal_text(text: str) -> str:
    """``text`` in Unicode NFC."""
    return unicodedata.normalize("NFC", text)


def _hidden(ch: str) -> bool:
    cat = unicodedata.category(ch)
    return cat[0] == "C" or cat in ("Zl", "Zp")


def shown(text: str, *, keep: str = "\n\t") -> str:
    """``text`` safe to print on a terminal: hidden and control characters shown escaped.

    The one function every printed piece of input text goes through (the
    command line's output and messages, the text tables). An escape
    sequence (ESC, U+001B), a carriage return, a right-to-left override and
    the like become visible ``\\u001b``, ``\\u000d``, ``\\u202e`` (the same escapes JSON
    uses, so JSON output stays valid); the characters in ``keep`` (line
    breaks and tabs, which the tool's own layout uses) pass.
    """
    if not any(_hidden(ch) for ch in text):
        return text
    out = []
    for ch in text:
        if ch in keep or not _hidden(ch):
            out.append(ch)
        else:
            out.append(f"\\u{ord(ch):04x}" if ord(ch) <= 0xFFFF else f"\\U{ord(ch):08x}")
    return "".join(out)


def hidden_characters(text: str) -> list[str]:
    """The characters of ``text`` that do not print or that steer the text direction, as U+XXXX names.

    Unicode general categories C* (controls, format characters such as
    U+200D ZERO WIDTH JOINER and U+200F RIGHT-TO-LEFT MARK, private use,
    unassigned) and the line and paragraph separators (Zl, Zp).
    """
    out = []
    for ch in text:
        if _hidden(ch):
            label = f"U+{ord(ch):04X} {unicodedata.name(ch, '').strip()}".rstrip()
            if label not in out:
                out.append(label)
    return out


def check_visible(text: str, what: str) -> str:
    """``text`` in NFC; ValueError naming the hidden characters if it holds any."""
    hidden = hidden_characters(text)
    if hidden:
        raise ValueError(
            f"{what} '{shown(text, keep='')}' holds characters that do not print "
            f"or that change the text direction ({', '.join(hidden)}); retype it without them"
        )
    return normal_text(text)


def name_key(text: str) -> str:
    """The key two names collide on: compatibility forms folded (NFKC), case ignored."""
    return unicodedata.normalize("NFKC", unicodedata.normalize("NFKC", text).casefold())
