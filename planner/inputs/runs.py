"""The runs table: finished (and pending) runs, checked once into numpy arrays.

A runs file is CSV (or tab-separated text) or an ``.xlsx`` workbook with a
header row: ``run_id``, one column per factor, one per response (objective
and limits), and an optional ``notes`` column (and an optional ``cautions``
column, which our own starting designs carry and which is not read). A response cell left empty
means "not measured yet": a run with every response empty is *pending* and
is not used as data.

Files as laboratories export them are read without guessing:

* a byte-order mark (UTF-8 or UTF-16), leading ``# ...`` comment lines
  (our own starting designs carry them) and an Excel ``sep=;`` line;
* comma, semicolon or tab separators, found from the header line or
  stated (``delimiter``); decimal commas, found from the cells (a file that
  mixes decimal points and commas is refused) or stated (``decimal``); in
  a comma-separated file a comma inside a number is never read as a
  decimal mark unless stated;
* spaces around headers and cells, blank rows at the end;
* in a workbook, the first sheet or the one named (``sheet``); numbers
  stay numbers, text is trimmed; a formula without a saved result, an
  error value (``#DIV/0!``), a date or TRUE/FALSE in a number column is
  refused, naming the cell (``Sheet1!C5``).

A header may state a unit in brackets (``force [N]``); the column's values
are then converted to the protocol's unit, or refused where that is not
safe (see :mod:`planner.units`). Each conversion is listed in ``flags``. A
limit's ``lower``/``upper`` are in the limit's (the response's) unit.

Every problem in the file is collected and reported together, before
anything is computed, naming the row (as a spreadsheet shows it: the header
is row 1) and the column. Values outside a factor's bounds are kept but
flagged.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import io
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from guardband.planner import settings
from guardband.planner.errors import RunsDataError
from guardband.planner.inputs.cells import HAS_COMMA, HAS_DOT, cell_number, cell_text, only_a_decimal_comma
from guardband.planner.inputs.names import check_visible, name_key, normal_text
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.reading import read_input
from guardband.planner.inputs.workbook import read_sheet
from guardband.planner.inputs.runchecks import (
    binomial_counts,
    missing_column_problem,
    rate_column_problem,
    check_unit,
    factor_value_flags,
    mixture_total_problems,
    to_protocol_units,
)

__all__ = [
    "RunsTable",
    "read_runs",
    "read_runs_bytes",
    "parse_runs_text",
    "RUN_ID",
    "NOTES",
    "CAUTIONS",
    "DELIMITERS",
    "DECIMALS",
]

RUN_ID = "run_id"
NOTES = "notes"
#: The column of cautions our own tables of runs carry (a starting design); read and ignored.
CAUTIONS = "cautions"
#: Field separators a runs text file may use, by the names an option takes.
DELIMITERS = {",": ",", ";": ";", "tab": "\t", "\t": "\t"}
DECIMALS = (".", ",")
_MAX_PROBLEMS = 50
_HEADER_UNIT = re.compile(r"^(?P<name>.*?)\s*\[(?P<unit>[^\]]*)\]\s*$")
_PAREN_UNIT = re.compile(r"^(?P<name>.*?)\s*\((?P<unit>[^)]*)\)\s*$")
_SEP_LINE = re.compile(r"^\s*sep=(.)\s*$")
_FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r", "\0")
_ZIP_MAGIC = b"PK\x03\x04"
_OLE_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"


@dataclass(frozen=True)
class RunsTable:
    """Checked runs.

    Attributes
    ----------
    run_ids : tuple of str
    X : ndarray of shape (n_runs, n_factors)
        Factor values in protocol units.
    Y : dict of str to ndarray of shape (n_runs,)
        Each response in protocol units; NaN where not measured.
    notes : tuple of str
    flags : tuple of str
        Warnings that did not stop the run from being used (outside bounds,
        a unit conversion).
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
    #: Binomial responses: (events, subjects) per run, NaN where not measured; Y holds the rate.
    counts: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)

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


@dataclass
class _Grid:
    """Cells as read, before any checking."""

    rows: list[list[object]]
    row_numbers: list[int]
    sheet: str | None = None  # a workbook sheet: cells are named "Sheet1!C5"
    delimiter: str | None = None

    def ref(self, i: int, j: int) -> str:
        """Cell (row ``i``, column ``j``) as a workbook names it, " (Sheet1!C5)"; "" in a text file."""
        return f" ({self.sheet}!{_column_letter(j)}{self.row_numbers[i]})" if self.sheet else ""

    def where(self, i: int, rid: str = "") -> str:
        """Row ``i`` as messages name it: "row 5", or "row 5 (run R1)" with a run id."""
        return f"row {self.row_numbers[i]}" + (f" (run {rid})" if rid else "")

    def at(self, i: int, j: int, column: str, rid: str = "") -> str:
        """A cell as messages name it: "row 5 (run R1), column x (Sheet1!B5)"."""
        return f"{self.where(i, rid)}, column {column}{self.ref(i, j)}"


def _blank(value: object) -> bool:
    return value is None or (isinstance(value, str) and not value.strip())


def _blank_row(row: list[object]) -> bool:
    return all(_blank(c) for c in row)


def _column_letter(j: int) -> str:
    """Spreadsheet column letter for a 0-based index (0 -> A, 26 -> AA)."""
    out = ""
    j += 1
    while j:
        j, r = divmod(j - 1, 26)
        out = chr(65 + r) + out
    return out


def _sheet_ref(sheet: str) -> str:
    return sheet if re.fullmatch(r"[A-Za-z_][A-Za-z0-9_.]*", sheet) else "'" + sheet.replace("'", "''") + "'"


def _join(source: str, problems: list[str]) -> str:
    if len(problems) > _MAX_PROBLEMS:
        head = f"{source}: more than {_MAX_PROBLEMS} problems found; the first {_MAX_PROBLEMS}:"
        problems = problems[:_MAX_PROBLEMS]
    else:
        head = f"{source}: {len(problems)} problem{'s' if len(problems) != 1 else ''} found"
    return head + "\n" + "\n".join(f"  - {p}" for p in problems)


# ------------------------------------------------------------ reading
def read_runs(
    path: str | Path,
    protocol: Protocol,
    *,
    delimiter: str | None = None,
    decimal: str | None = None,
    sheet: str | None = None,
    max_runs: int | None = None,
    responses_required: bool = True,
) -> RunsTable:
    """Read and check a runs file (CSV, tab-separated text or .xlsx) against a protocol.

    Parameters
    ----------
    path : str or Path
    protocol : Protocol
    delimiter : {",", ";", "tab"}, optional
        Field separator of a text file; found from the header line if not given.
    decimal : {".", ","}, optional
        Decimal mark of text cells; found from the cells if not given.
    sheet : str, optional
        Workbook sheet to read; the first sheet if not given.
    max_runs : int, optional
        Most rows taken; a larger table is refused before its cells are checked.
    responses_required : bool
        False for a table of recipes (no results): response columns may be left out.

    Raises
    ------
    RunsDataError
        Listing every problem with its row and column; nothing is computed.
    """
    path = Path(path)
    raw = read_input(path, what="runs", error=RunsDataError, max_bytes=settings.MAX_RUNS_FILE_BYTES)
    return read_runs_bytes(raw, protocol, source=path.name, suffix=path.suffix,
                           delimiter=delimiter, decimal=decimal, sheet=sheet, max_runs=max_runs,
                           responses_required=responses_required)


def read_runs_bytes(
    raw: bytes,
    protocol: Protocol,
    *,
    source: str = "runs",
    suffix: str = "",
    delimiter: str | None = None,
    decimal: str | None = None,
    sheet: str | None = None,
    max_runs: int | None = None,
    responses_required: bool = True,
) -> RunsTable:
    """Check a runs file given as its bytes; see :func:`read_runs`.

    The format is taken from the content (a workbook is a zip archive), not
    from ``suffix``, which only sharpens the messages. ``sha256`` of the
    table is the digest of exactly these bytes. A table of more than
    ``max_runs`` rows is refused before its cells are checked.
    """
    delimiter, decimal = _check_options(source, delimiter, decimal)
    sha256 = hashlib.sha256(raw).hexdigest()
    kind = _format_of(raw, suffix, source)
    if kind == "xlsx":
        grid = _read_xlsx(raw, source=source, sheet=sheet)
        return _check_grid(grid, protocol, source=source, sha256=sha256, decimal=decimal, max_runs=max_runs,
                       responses_required=responses_required)
    if sheet is not None:
        raise RunsDataError(f"{source}: a sheet ({sheet!r}) was named, but the file is text, not a workbook")
    return parse_runs_text(_decode(raw, source), protocol, source=source, sha256=sha256,
                           delimiter=delimiter, decimal=decimal, max_runs=max_runs,
                           responses_required=responses_required)


def _check_options(source: str, delimiter, decimal) -> tuple[str | None, str | None]:
    if delimiter is not None:
        if delimiter not in DELIMITERS:
            raise RunsDataError(
                f"{source}: delimiter {delimiter!r} is not one of "
                f"{', '.join(repr(k) for k in DELIMITERS if k != chr(9))}"
            )
        delimiter = DELIMITERS[delimiter]
    if decimal is not None and decimal not in DECIMALS:
        raise RunsDataError(f"{source}: decimal mark {decimal!r} is not '.' or ','")
    return delimiter, decimal


def _format_of(raw: bytes, suffix: str, source: str) -> str:
    suffix = suffix.lower()
    if raw.startswith(_OLE_MAGIC):
        raise RunsDataError(
            f"{source}: an old-style Excel .xls workbook or a password-protected workbook; "
            "save it as .xlsx without a password, or export CSV UTF-8"
        )
    if raw.startswith(_ZIP_MAGIC):
        head = raw[:200]
        if b"mimetypeapplication/vnd.oasis.opendocument" in head:
            raise RunsDataError(
                f"{source}: an OpenDocument spreadsheet; save it as .xlsx or export CSV UTF-8"
            )
        if suffix == ".xlsb":
            raise RunsDataError(f"{source}: a binary .xlsb workbook; save it as .xlsx or export CSV UTF-8")
        return "xlsx"
    if suffix in (".xlsx", ".xlsm"):
        raise RunsDataError(
            f"{source}: not a valid .xlsx workbook (the file is not a zip archive); "
            "save it again from the spreadsheet program, or export CSV UTF-8"
        )
    return "text"


def _decode(raw: bytes, source: str) -> str:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        try:
            return raw.decode("utf-16")
        except UnicodeDecodeError as exc:
            raise RunsDataError(f"{source}: not valid UTF-16 text (byte {exc.start})") from None
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise RunsDataError(
            f"{source}: not UTF-8 text (row {line}, byte {exc.start}: 0x{raw[exc.start]:02x}); "
            "save the file as CSV UTF-8 (the tool does not guess other encodings)"
        ) from None


def parse_runs_text(
    text: str,
    protocol: Protocol,
    *,
    source: str = "runs.csv",
    sha256: str | None = None,
    delimiter: str | None = None,
    decimal: str | None = None,
    max_runs: int | None = None,
    responses_required: bool = True,
) -> RunsTable:
    """Check a runs table given as text; see :func:`read_runs` and :func:`read_runs_bytes`."""
    delimiter, decimal = _check_options(source, delimiter, decimal)
    if sha256 is None:
        sha256 = hashlib.sha256(text.encode("utf-8")).hexdigest()
    if text.startswith("\ufeff"):
        text = text[1:]
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    nul = text.find("\0")
    if nul >= 0:
        raise RunsDataError(
            f"{source}: row {text.count(chr(10), 0, nul) + 1} holds a NUL character; the file is "
            "binary, or UTF-16 without a byte-order mark: export it as CSV UTF-8"
        )
    # leading "# ..." lines are comments (our own outputs carry their
    # cautions and fingerprints there), and Excel may write a "sep=;" line;
    # they are skipped, and the row numbers below still count them, as a
    # spreadsheet would
    lines = text.split("\n")
    skip = 0
    while skip < len(lines) and lines[skip].lstrip().startswith("#"):
        skip += 1
    if skip < len(lines):
        m = _SEP_LINE.match(lines[skip])
        if m and m.group(1) in DELIMITERS:
            delimiter = delimiter or DELIMITERS[m.group(1)]
            skip += 1
    body = "\n".join(lines[skip:])
    if delimiter is None:
        delimiter = _sniff_delimiter(lines[skip] if skip < len(lines) else "")
    reader = csv.reader(io.StringIO(body), delimiter=delimiter, strict=True)
    rows: list[list[object]] = []
    filled = 0  # rows with a value, header included
    try:
        for row in reader:
            rows.append(list(row))
            filled += not _blank_row(row)
            if max_runs is not None and filled - 1 > max_runs:  # stop reading: a step will not take them
                lines = body.count("\n") + (not body.endswith("\n"))
                raise RunsDataError(too_many_runs(source, lines - 1, max_runs, at_least=True))
    except csv.Error as exc:
        raise RunsDataError(
            f"{source}: row {len(rows) + 1 + skip}: the file cannot be read as "
            f"{_delimiter_name(delimiter)}-separated text ({exc}); a quoted cell may not be closed"
        ) from None
    grid = _Grid(rows=rows, row_numbers=[skip + i + 1 for i in range(len(rows))], delimiter=delimiter)
    return _check_grid(grid, protocol, source=source, sha256=sha256, decimal=decimal, max_runs=max_runs,
                       responses_required=responses_required)


def _delimiter_name(d: str) -> str:
    return {",": "comma", ";": "semicolon", "\t": "tab"}.get(d, repr(d))


def _sniff_delimiter(header_line: str) -> str:
    """The separator used most in the header line (outside quotes); comma on a tie."""
    outside = re.sub(r'"[^"]*"', "", header_line)
    counts = {d: outside.count(d) for d in (",", ";", "\t")}
    best = max(counts.values())
    if best == 0 or counts[","] == best:
        return ","
    return ";" if counts[";"] == best else "\t"


def _read_xlsx(raw: bytes, *, source: str, sheet: str | None) -> _Grid:
    rows, numbers, title = read_sheet(raw, source=source, sheet=sheet)
    # leading "# ..." rows (a starting design opened and saved in a spreadsheet)
    skip = 0
    while skip < len(rows):
        first = next((v for v in rows[skip] if not _blank(v)), None)
        if isinstance(first, str) and first.startswith("#"):
            skip += 1
        else:
            break
    return _Grid(rows=rows[skip:], row_numbers=numbers[skip:], sheet=_sheet_ref(title))


# ------------------------------------------------------------ the decimal mark
def _decimal_of(grid: _Grid, numeric_cols: list[tuple[str, int]],
                stated: str | None) -> tuple[str | None, str | None]:
    """The decimal mark of the text cells, and a problem when the file mixes them, or when the
    stated mark is plainly not the file's (None then: the cells are not reported one by one)."""
    if stated is not None:
        wrong = _stated_mark_wrong(grid, numeric_cols, stated)
        return (None, wrong) if wrong else (stated, None)
    if _commas_in_cells(grid):
        return ".", None
    first_dot, first_comma = _first_marks(grid, numeric_cols)
    if first_dot and first_comma:
        (i1, n1, s1), (i2, n2, s2) = first_dot, first_comma
        return None, (
            f"the file mixes decimal points ({grid.where(i1)}, column {n1}: {s1!r}) and decimal commas "
            f"({grid.where(i2)}, column {n2}: {s2!r}); write every number the same way, or state the "
            "decimal mark (--decimal . or --decimal ,)"
        )
    return ("," if first_comma else "."), None


def _commas_in_cells(grid: _Grid) -> bool:
    """Whether a comma inside a number is reported cell by cell: in a comma-separated file, or
    in text in a workbook (whose numbers are numbers), it may as well be a thousands separator."""
    return grid.delimiter == "," or grid.sheet is not None


def _stated_mark_wrong(grid: _Grid, numeric_cols: list[tuple[str, int]], stated: str) -> str | None:
    """The one problem when the file plainly uses the other decimal mark than the one stated: a
    stated comma meets only decimal points, or a stated point meets only decimal commas in a file
    where a comma cannot be a thousands separator ('0,8696', not '1,234'; not comma-separated)."""
    if stated == ",":
        found, other = _first_marks(grid, numeric_cols)
        uses, lacks, mark = "points", "comma", "."
    elif not _commas_in_cells(grid):
        other, found = _first_marks(grid, numeric_cols, comma=only_a_decimal_comma)
        uses, lacks, mark = "commas", "point", ","
    else:
        return None
    if not found or other:
        return None
    i, column, s = found
    return (f"the decimal mark is stated as {stated!r} (--decimal {stated}), but the file appears to use "
            f"decimal {uses} ({grid.where(i)}, column {column}: {s!r}; no number has a decimal {lacks}); "
            f"leave out --decimal, or state --decimal {mark}")


def _first_marks(grid: _Grid, numeric_cols: list[tuple[str, int]],
                 comma=HAS_COMMA.match) -> tuple[tuple | None, tuple | None]:
    """The first text cell with a decimal point and the first with a decimal comma (as ``comma``
    tells), each as (row index, column name, text), or None."""
    first_dot = first_comma = None
    for i, row in enumerate(grid.rows[1:], start=1):
        for name, j in numeric_cols:
            if j >= len(row) or not isinstance(row[j], str):
                continue
            s = row[j].strip()
            if first_dot is None and HAS_DOT.match(s):
                first_dot = (i, name, s)
            elif first_comma is None and comma(s):
                first_comma = (i, name, s)
        if first_dot and first_comma:
            break
    return first_dot, first_comma


def too_many_runs(source: str, n: int, max_runs: int, *, at_least: bool = False) -> str:
    """The refusal of a table with more rows than a planning step takes, saying how to raise the limit.

    ``at_least``: ``n`` counts the file's lines (read no further), an upper bound of its runs.
    """
    runs = f"up to {n:,} runs (its lines below the header)" if at_least else f"{n:,} runs"
    return (f"{source}: {runs}, more than the {max_runs:,} a planning step takes (the models' fitting "
            f"time grows with the cube of the number of runs; {settings.MAX_RUNS_DEFAULT:,} runs took about "
            f"half a minute on a 2-core machine). To plan with them all, raise the limit: "
            f"guardband plan ... --max-runs {n}")


# ------------------------------------------------------------ checking
def _split_header(cell: str) -> tuple[str, str | None]:
    m = _HEADER_UNIT.match(cell)
    if m:
        return m.group("name").strip(), m.group("unit").strip()
    return cell, None


def _suggest(name: str, known: list[str]) -> str:
    lower = {k.lower(): k for k in known}
    if name.lower() in lower:
        return f"; did you mean {lower[name.lower()]!r}? (names are case-sensitive)"
    m = _PAREN_UNIT.match(name)
    if m and m.group("name").strip() in known:
        return (f"; units go in square brackets: '{m.group('name').strip()} "
                f"[{m.group('unit').strip()}]'")
    close = difflib.get_close_matches(name, known, n=1, cutoff=0.75)
    return f"; did you mean {close[0]!r}?" if close else ""


@dataclass
class _Columns:
    """The header row as checked.

    Attributes
    ----------
    at : dict of str to int
        The 0-based column of each known name the header holds once.
    convert : dict of str to Conversion or None
        Columns whose stated unit is not the protocol's: the conversion, or
        None where the unit cannot be converted.
    """

    at: dict[str, int] = field(default_factory=dict)
    convert: dict[str, object] = field(default_factory=dict)


@dataclass
class _Values:
    """The data rows as read, one entry per row (numbers in the header's units until converted)."""

    run_ids: list[str]
    notes: list[str]
    wheres: list[str]  # each row as messages name it: "row 5 (run R1)"
    X: np.ndarray
    Y: dict[str, np.ndarray]


def _check_grid(grid: _Grid, protocol: Protocol, *, source: str, sha256: str,
                decimal: str | None, max_runs: int | None = None,
                responses_required: bool = True) -> RunsTable:
    """Check cells as read against the protocol: header, cells, units, bounds and totals.

    Raises
    ------
    RunsDataError
        Listing every problem found; nothing is computed.
    """
    grid = _trimmed(grid, source)
    n_runs = sum(not _blank_row(r) for r in grid.rows[1:])
    if max_runs is not None and n_runs > max_runs:
        raise RunsDataError(too_many_runs(source, n_runs, max_runs))
    problems: list[str] = []
    flags: list[str] = []
    columns = _check_header(grid, protocol, problems, flags,
                            optional=() if responses_required else protocol.runs_columns)
    numeric_cols = [(n, columns.at[n]) for n in (*protocol.factor_names, *protocol.runs_columns)
                    if n in columns.at]
    decimal, mixed = _decimal_of(grid, numeric_cols, decimal)
    if mixed:
        problems.append(mixed)
    values = _read_rows(grid, protocol, columns, decimal, problems)
    problems += to_protocol_units(protocol, values.X, values.Y, columns.convert, values.wheres)
    counts = binomial_counts(protocol, values.Y, values.wheres, problems,
                             absent=set(protocol.runs_columns) - set(columns.at))
    flags += factor_value_flags(protocol, values.X, values.wheres, columns.convert)
    problems += mixture_total_problems(protocol, values.X, values.wheres, columns.convert)
    if problems:
        raise RunsDataError(_join(source, problems))
    return RunsTable(
        run_ids=tuple(values.run_ids),
        X=values.X,
        Y=values.Y,
        notes=tuple(values.notes),
        flags=tuple(flags),
        sha256=sha256,
        source=source,
        factor_names=protocol.factor_names,
        counts=counts,
    )


def _trimmed(grid: _Grid, source: str) -> _Grid:
    """The grid without blank trailing rows (spreadsheets leave them); it must start with a header."""
    rows, numbers = list(grid.rows), list(grid.row_numbers)
    while rows and _blank_row(rows[-1]):
        rows.pop()
        numbers.pop()
    if not rows:
        raise RunsDataError(f"{source}: the file is empty; it needs a header row")
    if _blank_row(rows[0]):
        raise RunsDataError(
            f"{source}: row {numbers[0]} is blank; the header row (run_id, the factors, the "
            "responses) must come first"
        )
    return _Grid(rows, numbers, grid.sheet, grid.delimiter)


# ------------------------------------------------------------ the header
def _check_header(grid: _Grid, protocol: Protocol, problems: list[str], flags: list[str],
                  optional=()) -> _Columns:
    """Find each known column, appending a problem for each unknown, repeated or missing one
    (``optional`` columns may be missing)."""
    factor_names, responses = list(protocol.factor_names), list(protocol.runs_columns)
    known_list = [RUN_ID, *factor_names, *responses, NOTES, CAUTIONS]
    known = set(known_list)
    rates = {item.name: item for item in protocol.binomial_responses}
    columns = _Columns()
    twice: set[str] = set()
    for j, cell in enumerate(grid.rows[0]):
        letter = _column_letter(j)
        name, unit = _header_name(cell, known | set(rates))
        if not name:
            if any(j < len(r) and not _blank(r[j]) for r in grid.rows[1:]):
                problems.append(f"column {letter}{grid.ref(0, j)} has values but no header")
        elif name in rates:
            problems.append(rate_column_problem(rates[name], f"column {letter}{grid.ref(0, j)}"))
        elif name in columns.at:
            problems.append(f"column {letter}{grid.ref(0, j)}: header {name!r} appears twice")
            twice.add(name)
        elif name not in known:
            problems.append(
                f"column {letter}{grid.ref(0, j)}: unknown column {name!r}{_suggest(name, known_list)}; "
                f"expected {RUN_ID}, the factors ({', '.join(factor_names)}), the responses "
                f"({', '.join(responses)}), {NOTES} or {CAUTIONS}"
            )
        else:
            columns.at[name] = j
            if unit and name in (RUN_ID, NOTES, CAUTIONS):
                problems.append(f"column {letter} ({name}): a unit [{unit}] makes no sense here; remove it")
            elif unit and name not in protocol.response_names and name in responses:
                problems.append(f"column {letter} ({name}): a count takes no unit [{unit}]; remove it")
            elif unit:
                check_unit(columns.convert, f"column {letter} ({name})", name, unit, protocol,
                           problems, flags)
    for name in known_list:
        if name not in (NOTES, CAUTIONS) and name not in optional and name not in columns.at and name not in twice:
            problems.append(missing_column_problem(protocol, name))
    return columns


def _header_name(cell: object, known: set[str]) -> tuple[str, str | None]:
    """A header cell as (name, unit stated in brackets or None)."""
    text = normal_text(cell_text(cell))
    # a name that itself ends in brackets ("x [1]") is taken whole
    name, unit = (text, None) if text in known else _split_header(text)
    if name not in known and name[:1] == "'" and name[1:2] in _FORMULA_PREFIXES and name[1:] in known:
        name = name[1:]  # undo the spreadsheet-safe escape our own outputs carry
    return name, unit


# ------------------------------------------------------------ the rows
def _read_rows(grid: _Grid, protocol: Protocol, columns: _Columns, decimal: str | None,
               problems: list[str]) -> _Values:
    """Read each data row's run id, notes and numbers, appending a problem for each bad cell.

    Stops after the row that takes the problems past ``_MAX_PROBLEMS``.
    """
    n = len(grid.rows) - 1
    values = _Values([], [], [], np.full((n, len(protocol.factors)), np.nan),
                     {r: np.full(n, np.nan) for r in protocol.runs_columns})
    seen_ids: dict[str, tuple[str, int]] = {}
    width = len(grid.rows[0])
    for k, row in enumerate(grid.rows[1:]):
        i, line = k + 1, grid.row_numbers[k + 1]
        if _blank_row(row):
            problems.append(f"row {line}: the row is blank; delete it")
            values.run_ids.append("")
            values.notes.append("")
            values.wheres.append(grid.where(i))
            continue
        if len(row) > width and any(not _blank(c) for c in row[width:]):
            problems.append(f"row {line}: {len(row)} cells but the header has {width}")
        rid = _run_id(grid, i, columns, seen_ids, problems)
        values.run_ids.append(rid)
        values.wheres.append(grid.where(i, rid))
        values.notes.append(cell_text(_cell(row, columns.at[NOTES])) if NOTES in columns.at else "")
        values.X[k] = _row_numbers(grid, i, rid, protocol.factor_names, columns, decimal, problems,
                                   empty="the factor value is empty")
        y = _row_numbers(grid, i, rid, protocol.runs_columns, columns, decimal, problems,
                         hint=" (leave it empty if not measured)")
        for r, v in zip(protocol.runs_columns, y):
            values.Y[r][k] = v
        if len(problems) > _MAX_PROBLEMS:
            break
    return values


def _cell(row: list[object], j: int) -> object:
    return row[j] if j < len(row) else None


def _run_id(grid: _Grid, i: int, columns: _Columns, seen: dict[str, tuple[str, int]],
            problems: list[str]) -> str:
    """Row ``i``'s run id; an empty id, or one an earlier row used (``seen``), is a problem."""
    if RUN_ID not in columns.at:
        return ""
    j = columns.at[RUN_ID]
    rid = normal_text(cell_text(_cell(grid.rows[i], j)))
    try:
        check_visible(rid, "run id")
    except ValueError as exc:
        problems.append(f"{grid.at(i, j, RUN_ID)}: {exc}")
        return rid
    key = name_key(rid)
    if not rid:
        problems.append(f"{grid.at(i, j, RUN_ID)}: the run id is empty")
    elif key in seen:
        first, line = seen[key]
        also = "" if first == rid else f" as {first!r} (they differ only in case or in compatibility forms)"
        problems.append(f"{grid.at(i, j, RUN_ID, rid)}: run id {rid!r} is also used in row {line}{also}")
    else:
        seen[key] = (rid, grid.row_numbers[i])
    return rid


def _row_numbers(grid: _Grid, i: int, rid: str, names, columns: _Columns, decimal: str | None,
                 problems: list[str], *, empty: str = "", hint: str = "") -> np.ndarray:
    """Row ``i``'s numbers in the columns ``names``, NaN where empty or not a number.

    A cell that is not a number is a problem (with ``hint`` added where it is
    text); so is an empty cell when ``empty`` (that problem's text) is given.
    """
    out = np.full(len(names), np.nan)
    for q, name in enumerate(names):
        if name not in columns.at:
            continue
        j = columns.at[name]
        v, problem = cell_number(_cell(grid.rows[i], j), decimal)
        if problem is None and v is None and empty:
            problems.append(f"{grid.at(i, j, name, rid)}: {empty}")
        elif problem:
            extra = hint if problem.endswith("is not a number") else ""
            problems.append(f"{grid.at(i, j, name, rid)}: {problem}{extra}")
        elif v is not None:
            out[q] = v
    return out
