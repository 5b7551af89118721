"""Reading one sheet of an ``.xlsx`` workbook into rows of cell values, within stated sizes.

A workbook is a zip archive of XML parts: a few kilobytes can declare a
sheet of a million rows, or unpack to gigabytes. Before any cell is loaded
the archive's unpacked size and the sheet's declared dimensions are
checked, and while the rows are read (openpyxl's read-only mode, which
streams them) the row number and the number of cells are checked again, so
that a sheet that lies about its size is refused as soon as it passes the
limits in :mod:`planner.settings`.
"""

from __future__ import annotations

import io
import zipfile
from dataclasses import dataclass

from guardband.planner import settings
from guardband.planner.errors import RunsDataError

__all__ = ["Formula", "SheetError", "read_sheet"]

#: Largest unpacked size of a workbook's parts, in bytes.
_MAX_UNPACKED = 8 * settings.MAX_RUNS_FILE_BYTES


@dataclass(frozen=True)
class Formula:
    """A workbook cell holding a formula whose result was never saved."""

    text: str


@dataclass(frozen=True)
class SheetError:
    """A workbook cell holding an error value such as ``#DIV/0!``."""

    code: str


def _too_big(source: str, what: str) -> RunsDataError:
    return RunsDataError(
        f"{source}: {what}; the tool reads sheets of at most {settings.MAX_SHEET_ROWS:,} rows and "
        f"{settings.MAX_SHEET_CELLS:,} cells. Delete the unused rows and columns (select them, delete, "
        "save), or export the runs as CSV UTF-8"
    )


def _check_archive(raw: bytes, source: str) -> None:
    """Refuse a workbook whose parts unpack to more than ``_MAX_UNPACKED`` bytes."""
    try:
        with zipfile.ZipFile(io.BytesIO(raw)) as archive:
            unpacked = sum(info.file_size for info in archive.infolist())
    except (zipfile.BadZipFile, OSError, ValueError):
        return  # openpyxl names the damage below
    if unpacked > _MAX_UNPACKED:
        raise _too_big(source, f"the workbook unpacks to {unpacked:,} bytes (more than {_MAX_UNPACKED:,})")


def _check_declared(ws, source: str, title: str) -> None:
    """Refuse a sheet whose declared dimensions exceed the limits (read from its header, no cells loaded)."""
    rows, cols = ws.max_row or 0, ws.max_column or 0
    if rows > settings.MAX_SHEET_ROWS or rows * cols > settings.MAX_SHEET_CELLS:
        raise _too_big(source, f"sheet {title!r} declares {rows:,} rows and {cols:,} columns")


def _open_books(raw: bytes, source: str):
    import openpyxl

    books = []
    try:
        for data_only in (True, False):
            books.append(openpyxl.load_workbook(io.BytesIO(raw), read_only=True, data_only=data_only))
    except Exception as exc:  # a damaged workbook raises KeyError, BadZipFile, XML errors, ...
        for b in books:
            b.close()
        raise RunsDataError(
            f"{source}: cannot read the workbook ({type(exc).__name__}: {exc}); save it again as "
            ".xlsx, or export CSV UTF-8"
        ) from None
    return books


def _pick(names: list[str], sheet: str | None, source: str) -> str:
    if not names:
        raise RunsDataError(f"{source}: the workbook has no sheets")
    if sheet is None:
        return names[0]
    if sheet in names:
        return sheet
    raise RunsDataError(
        f"{source}: there is no sheet {sheet!r}; the sheets are {', '.join(repr(n) for n in names)}"
    )


class _Budget:
    """Counts rows and cells as they stream past; refuses past the limits."""

    def __init__(self, source: str, title: str):
        self.source, self.title, self.cells, self.last = source, title, 0, 0

    def take(self, number: int, n_cells: int) -> None:
        self.cells += n_cells
        self.last = number
        if number > settings.MAX_SHEET_ROWS:
            raise _too_big(self.source, f"sheet {self.title!r} reaches past row {settings.MAX_SHEET_ROWS:,}")
        if self.cells > settings.MAX_SHEET_CELLS:
            raise _too_big(self.source, f"sheet {self.title!r} holds more than {settings.MAX_SHEET_CELLS:,} cells")


def _formulas(wf, budget: _Budget) -> dict[tuple[int, int], str]:
    out: dict[tuple[int, int], str] = {}
    for number, cells in enumerate(wf.iter_rows(), start=1):
        number = next((c.row for c in cells if getattr(c, "row", None)), number)
        budget.take(number, len(cells))
        for j, c in enumerate(cells):
            if getattr(c, "data_type", None) == "f" and c.value is not None:
                text = c.value if isinstance(c.value, str) else getattr(c.value, "text", str(c.value))
                out[(number, j)] = str(text)
    return out


def _values(ws, formulas: dict, budget: _Budget) -> tuple[list[list[object]], list[int]]:
    rows: list[list[object]] = []
    numbers: list[int] = []
    for number, cells in enumerate(ws.iter_rows(), start=1):
        number = next((c.row for c in cells if getattr(c, "row", None)), number)
        budget.take(number, len(cells))
        row: list[object] = []
        for j, c in enumerate(cells):
            v = c.value
            if getattr(c, "data_type", None) == "e":
                v = SheetError(str(v))
            elif v is None and (number, j) in formulas:
                v = Formula(formulas[(number, j)])
            elif isinstance(v, str):
                v = v.strip()
            row.append(v)
        # rows the sheet skips entirely still count
        while len(numbers) and numbers[-1] + 1 < number:
            numbers.append(numbers[-1] + 1)
            rows.append([])
        rows.append(row)
        numbers.append(number)
    return rows, numbers


def read_sheet(raw: bytes, *, source: str, sheet: str | None) -> tuple[list[list[object]], list[int], str]:
    """The rows of one sheet (cell values; :class:`Formula`, :class:`SheetError` where those stand).

    Returns
    -------
    (rows, row numbers as the sheet numbers them, sheet title)

    Raises
    ------
    RunsDataError
        A damaged workbook, a sheet that does not exist or is a chart, or a
        sheet beyond the size limits (checked before and while reading).
    """
    _check_archive(raw, source)
    values_book, formula_book = _open_books(raw, source)
    try:
        title = _pick(list(values_book.sheetnames), sheet, source)
        ws, wf = values_book[title], formula_book[title]
        if not hasattr(ws, "iter_rows"):
            raise RunsDataError(f"{source}: sheet {title!r} is a chart, not a table of cells")
        _check_declared(ws, source, title)
        # the declared dimensions are often wrong (and were checked above);
        # read the cells the sheet really holds
        ws.reset_dimensions()
        wf.reset_dimensions()
        budget = _Budget(source, title)
        try:
            formulas = _formulas(wf, budget)
            budget = _Budget(source, title)
            rows, numbers = _values(ws, formulas, budget)
        except (ValueError, TypeError, KeyError) as exc:  # openpyxl's own reading of a cell failed
            raise RunsDataError(
                f"{source}: sheet {title!r}, row {budget.last + 1}: a cell cannot be read "
                f"({type(exc).__name__}: {exc}); a number "
                "cell holds something that is not a finite number (such as inf or nan) or the sheet is "
                "damaged. Correct the cell in a spreadsheet program and save again, or export CSV UTF-8"
            ) from None
    finally:
        values_book.close()
        formula_book.close()
    return rows, numbers, title
