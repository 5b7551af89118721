"""Plain fixed-width text tables for the terminal."""

from __future__ import annotations

import math

from guardband.planner.inputs.names import shown

__all__ = ["format_cell", "render_table"]


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
        return f"{value:.{digits}g}"
    return str(value)


def render_table(header, rows, *, digits: int = 4, max_width: int = 48) -> str:
    """Render rows under a header as aligned text; long cells are cut with '...'.

    Every cell goes through :func:`planner.inputs.names.shown`, so text from
    an input (a run id, a factor name) cannot move the cursor or the text
    direction of the terminal.
    """
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
    return "\n".join(lines)


def _numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
