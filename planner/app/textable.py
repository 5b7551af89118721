"""Plain fixed-width text tables for the terminal."""

from __future__ import annotations

import math

from guardband.planner.inputs.names import shown

__all__ = ["format_cell", "render_table", "wrap_text", "TERMINAL_WIDTH"]

#: Table and prose output of the commands fits this many columns.
TERMINAL_WIDTH = 100


def format_cell(value, *, digits: int = 4) -> str:
    """A short text for one cell: numbers to ``digits`` significant figures."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            return "-"
        if value != 0 and (abs(value) >= 1e6 or abs(value) < 1e-3):
            return f"{value:.{digits - 1}e}"
        text = f"{value:.{digits}g}"
        # below 1e6 a whole number reads as one (10000 rpm, not 1e+04): more figures, never fewer
        return f"{value:.0f}" if "e" in text else text
    return str(value)


def render_table(header, rows, *, digits: int = 4, max_width: int = 48, width: int | None = TERMINAL_WIDTH,
                 keys: int = 1) -> str:
    """Render rows under a header as aligned text; long cells are cut with '...'.

    Every cell goes through :func:`planner.inputs.names.shown`, so text from
    an input (a run id, a factor name) cannot move the cursor or the text
    direction of the terminal. A table wider than ``width`` columns is
    printed in blocks of columns one under another, each block repeating
    the first ``keys`` columns (the row's name), so that no line is wider
    than ``width`` (unless one column alone is); ``width=None`` never splits.
    """
    lines = _table_lines(header, rows, digits=digits, max_width=max_width)
    if width is None or max(map(len, lines)) <= width or len(header) <= keys + 1:
        return "\n".join(lines)
    blocks = _column_blocks(header, rows, digits, max_width, width, keys)
    parts = []
    for cols in blocks:
        parts.append("\n".join(_table_lines([header[j] for j in cols], [[r[j] for j in cols] for r in rows],
                                            digits=digits, max_width=max_width)))
    return "\n\n".join(parts)


def _column_blocks(header, rows, digits, max_width, width, keys) -> list[list[int]]:
    """Split the columns after the first ``keys`` into blocks that fit ``width`` with the keys."""
    w = [len(_table_lines([header[j]], [[r[j]] for r in rows], digits=digits, max_width=max_width)[1])
         for j in range(len(header))]
    key_w = sum(w[:keys]) + 2 * keys
    blocks, current, used = [], [], key_w
    for j in range(keys, len(header)):
        if current and used + w[j] > width:
            blocks.append(list(range(keys)) + current)
            current, used = [], key_w
        current.append(j)
        used += w[j] + 2
    blocks.append(list(range(keys)) + current)
    return blocks


def wrap_text(text: str, *, width: int = TERMINAL_WIDTH, indent: str = "  ") -> str:
    """Prose wrapped to ``width`` columns, continuation lines indented (each line of the text on its own)."""
    import textwrap

    def fill(line: str) -> str:
        lead = line[:len(line) - len(line.lstrip())]
        return textwrap.fill(line, width=width, subsequent_indent=lead + indent, break_on_hyphens=False,
                             break_long_words=False)

    return "\n".join(fill(line) if len(line) > width else line for line in text.split("\n"))


def _table_lines(header, rows, *, digits: int, max_width: int) -> list[str]:
    cells = [[shown(str(h), keep="") for h in header]]
    for row in rows:
        out = []
        for v in row:
            t = shown(format_cell(v, digits=digits).replace("\n", " "), keep="")
            if len(t) > max_width:
                t = t[: max_width - 3] + "..."
            out.append(t)
        cells.append(out)
    widths = [max(len(r[j]) for r in cells) for j in range(len(header))]
    lines = []
    for k, r in enumerate(cells):
        lines.append("  ".join(c.rjust(w) if k and _numeric(c) else c.ljust(w) for c, w in zip(r, widths)).rstrip())
        if k == 0:
            lines.append("  ".join("-" * w for w in widths))
    return lines


def _numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
