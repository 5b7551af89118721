"""The runs table: finished (and pending) runs, checked once into numpy arrays.

A runs file is CSV with a header row: ``run_id``, one column per factor,
one per response (objective and limits), and an optional ``notes`` column.
A header may state a unit in brackets (``force [kN]``); it must then match
the protocol's unit. A response cell left empty means "not measured yet":
a run with every response empty is *pending* and is not used as data.

Every problem in the file is collected and reported together, naming the
row (as a spreadsheet shows it: the header is row 1) and the column.
Values outside a factor's bounds are kept but flagged.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import RunsDataError
from .protocol import Protocol

__all__ = ["RunsTable", "read_runs", "parse_runs_text", "RUN_ID", "NOTES"]

RUN_ID = "run_id"
NOTES = "notes"
_MAX_PROBLEMS = 50
_HEADER_UNIT = re.compile(r"^(?P<name>.*?)\s*\[(?P<unit>[^\]]*)\]\s*$")


@dataclass(frozen=True)
class RunsTable:
    """Checked runs.

    Attributes
    ----------
    run_ids : tuple of str
    X : ndarray of shape (n_runs, n_factors)
        Factor values in protocol units.
    Y : dict of str to ndarray of shape (n_runs,)
        Each response; NaN where not measured.
    notes : tuple of str
    flags : tuple of str
        Warnings that did not stop the run from being used (e.g. outside bounds).
    sha256 : str
        SHA-256 of the file's bytes.
    source : str
    """

    run_ids: tuple[str, ...]
    X: np.ndarray
    Y: dict[str, np.ndarray]
    notes: tuple[str, ...]
    flags: tuple[str, ...]
    sha256: str
    source: str = "runs"
    factor_names: tuple[str, ...] = field(default=())

    @property
    def n_runs(self) -> int:
        return len(self.run_ids)

    def measured(self, response: str) -> np.ndarray:
        """Boolean mask of runs where ``response`` was measured."""
        return np.isfinite(self.Y[response])

    @property
    def pending(self) -> np.ndarray:
        """Runs with no response measured at all."""
        if not self.Y:
            return np.ones(self.n_runs, dtype=bool)
        return ~np.any(np.column_stack([np.isfinite(v) for v in self.Y.values()]), axis=1)


def _sniff(text: str, delimiter: str | None) -> tuple[str, str]:
    """Choose the field separator and decimal mark.

    Semicolon-separated files (as spreadsheets export them where the comma
    is the decimal mark) are detected from the header line.
    """
    first = text.split("\n", 1)[0]
    if delimiter is None:
        delimiter = ";" if first.count(";") > first.count(",") else ","
    decimal = "," if delimiter == ";" else "."
    return delimiter, decimal


def _number(cell: str, decimal: str) -> float:
    s = cell.strip()
    if decimal == ",":
        s = s.replace(",", ".")
    value = float(s)  # raises ValueError for text
    return value


def parse_runs_text(
    text: str,
    protocol: Protocol,
    *,
    source: str = "runs.csv",
    sha256: str | None = None,
    delimiter: str | None = None,
) -> RunsTable:
    """Check a runs table given as text; see :func:`read_runs`."""
    if sha256 is None:
        sha256 = hashlib.sha256(text.encode("utf-8")).hexdigest()
    if text.startswith("\ufeff"):
        text = text[1:]
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    # leading "# ..." lines are comments (our own outputs carry their
    # cautions and fingerprints there); they are skipped, and the row
    # numbers below still count them, as a spreadsheet would
    lines = text.split("\n")
    n_comments = 0
    while n_comments < len(lines) and lines[n_comments].lstrip().startswith("#"):
        n_comments += 1
    body = "\n".join(lines[n_comments:])
    delimiter, decimal = _sniff(body, delimiter)
    rows = list(csv.reader(io.StringIO(body), delimiter=delimiter))
    # blank trailing rows (spreadsheets leave them) are dropped
    while rows and all(not c.strip() for c in rows[-1]):
        rows.pop()
    if not rows:
        raise RunsDataError(f"{source}: the file is empty; it needs a header row")
    problems: list[str] = []
    header_raw = rows[0]
    header: list[str] = []
    units_in_header: dict[int, str] = {}
    for j, cell in enumerate(header_raw):
        name = cell.strip()
        m = _HEADER_UNIT.match(name)
        if m:
            name = m.group("name").strip()
            units_in_header[j] = m.group("unit").strip()
        header.append(name)

    factors = protocol.factors
    factor_names = [f.name for f in factors]
    responses = list(protocol.response_names)
    unit_of = {f.name: f.unit for f in factors}
    unit_of[protocol.objective.name] = protocol.objective.unit
    unit_of.update({lim.name: lim.unit for lim in protocol.limits})
    known = set(factor_names) | set(responses) | {RUN_ID, NOTES}

    col: dict[str, int] = {}
    for j, name in enumerate(header):
        letter = _column_letter(j)
        if not name:
            if any(j < len(r) and r[j].strip() for r in rows[1:]):
                problems.append(f"column {letter} has values but no header")
            continue
        if name in col:
            problems.append(f"column {letter}: header {name!r} appears twice")
            continue
        if name not in known:
            problems.append(
                f"column {letter}: unknown column {name!r}; expected {RUN_ID}, the factors "
                f"({', '.join(factor_names)}), the responses ({', '.join(responses)}) or {NOTES}"
            )
            continue
        if j in units_in_header and name in unit_of and units_in_header[j] != unit_of[name]:
            problems.append(
                f"column {letter} ({name}): the header states unit [{units_in_header[j]}] but the "
                f"protocol's unit is [{unit_of[name]}]; convert the values or fix the header"
            )
        col[name] = j
    for name in [RUN_ID] + factor_names + responses:
        if name not in col and not any(p.endswith(f"{name!r} appears twice") for p in problems):
            problems.append(f"missing column {name!r}")
    if problems:
        raise RunsDataError(_join(source, problems))

    n = len(rows) - 1
    d = len(factor_names)
    X = np.full((n, d), np.nan)
    Y = {r: np.full(n, np.nan) for r in responses}
    ids: list[str] = []
    notes: list[str] = []
    flags: list[str] = []
    seen_ids: dict[str, int] = {}
    for i, row in enumerate(rows[1:]):
        line = i + 2 + n_comments
        if all(not c.strip() for c in row):
            problems.append(f"row {line}: the row is blank; delete it")
            continue
        if len(row) > len(header):
            extra = [c for c in row[len(header):] if c.strip()]
            if extra:
                problems.append(f"row {line}: {len(row)} cells but the header has {len(header)}")

        def cell(name: str) -> str:
            j = col[name]
            return row[j].strip() if j < len(row) else ""

        rid = cell(RUN_ID)
        where = f"row {line}" + (f" (run {rid})" if rid else "")
        if not rid:
            problems.append(f"row {line}, column {RUN_ID}: the run id is empty")
        elif rid in seen_ids:
            problems.append(f"{where}, column {RUN_ID}: run id {rid!r} is also used in row {seen_ids[rid]}")
        else:
            seen_ids[rid] = line
        ids.append(rid)
        notes.append(cell(NOTES) if NOTES in col else "")
        for k, f in enumerate(factors):
            raw = cell(f.name)
            if not raw:
                problems.append(f"{where}, column {f.name}: the factor value is empty")
                continue
            try:
                v = _number(raw, decimal)
            except ValueError:
                problems.append(f"{where}, column {f.name}: {raw!r} is not a number")
                continue
            if not math.isfinite(v):
                problems.append(f"{where}, column {f.name}: {raw!r} is not a finite number")
                continue
            X[i, k] = v
            tol = 1e-9 * max(1.0, abs(f.high))
            if f.kind == "discrete":
                if min(abs(v - lv) for lv in f.levels) > tol:
                    flags.append(
                        f"{where}, column {f.name}: {v:g} is not one of the levels "
                        f"{list(f.levels)} (kept)"
                    )
            elif v < f.low - tol or v > f.high + tol:
                flags.append(
                    f"{where}, column {f.name}: {v:g} is outside the bounds "
                    f"[{f.low:g}, {f.high:g}] (kept)"
                )
        for r in responses:
            raw = cell(r)
            if not raw:
                continue
            try:
                v = _number(raw, decimal)
            except ValueError:
                problems.append(f"{where}, column {r}: {raw!r} is not a number (leave it empty if not measured)")
                continue
            if not math.isfinite(v):
                problems.append(f"{where}, column {r}: {raw!r} is not a finite number")
                continue
            Y[r][i] = v
        if protocol.mixture is not None and not np.any(np.isnan(X[i])):
            comp = [k for k, f in enumerate(factors) if f.kind == "component"]
            total = float(X[i, comp].sum())
            if abs(total - protocol.mixture.total) > protocol.mixture.tolerance:
                problems.append(
                    f"{where}: the components add up to {total:.6g}, not {protocol.mixture.total:g} "
                    f"(tolerance {protocol.mixture.tolerance:g})"
                )
        if len(problems) >= _MAX_PROBLEMS:
            problems.append("... stopping after 50 problems")
            break
    if problems:
        raise RunsDataError(_join(source, problems))
    return RunsTable(
        run_ids=tuple(ids),
        X=X,
        Y=Y,
        notes=tuple(notes),
        flags=tuple(flags),
        sha256=sha256,
        source=source,
        factor_names=tuple(factor_names),
    )


def read_runs(path: str | Path, protocol: Protocol, *, delimiter: str | None = None) -> RunsTable:
    """Read and check a runs CSV file against a protocol.

    Raises
    ------
    RunsDataError
        Listing every problem with its row and column; nothing is computed.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise RunsDataError(f"{path}: cannot read the runs file ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise RunsDataError(
            f"{path.name}: not UTF-8 text (byte {exc.start}); save the file as UTF-8 CSV"
        ) from None
    return parse_runs_text(
        text,
        protocol,
        source=path.name,
        sha256=hashlib.sha256(raw).hexdigest(),
        delimiter=delimiter,
    )


def _column_letter(j: int) -> str:
    """Spreadsheet column letter for a 0-based index (0 -> A, 26 -> AA)."""
    out = ""
    j += 1
    while j:
        j, r = divmod(j - 1, 26)
        out = chr(65 + r) + out
    return out


def _join(source: str, problems: list[str]) -> str:
    head = f"{source}: {len(problems)} problem{'s' if len(problems) != 1 else ''} found"
    return head + "\n" + "\n".join(f"  - {p}" for p in problems)
