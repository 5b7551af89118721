"""Atomic file writing, file digests and CSV output that spreadsheets cannot run.

Every file Guardband writes goes through :func:`atomic_write_bytes` (or one
of its wrappers): the data go to a temporary file in the target's folder,
are flushed and synced to disk, and the temporary file is then renamed over
the target with :func:`os.replace`. A reader, or a crash, sees either the
whole old file or the whole new one, never a mixture.

How a table carries its notes and cautions
------------------------------------------
Every CSV table the command line writes for people is a plain table: one
header line, then one line per row, the same number of cells in each
(RFC 4180 knows no comment lines), so that ``pandas.read_csv(path)`` with
its default settings and a spreadsheet both open it as it is. What used to
be ``# ...`` lines above the header goes elsewhere:

- the notes (title, fingerprints, seed, tool version, the step's notes) and
  the cautions go to a companion text file named after the table
  (:func:`notes_path`: ``plan-<hash>.csv`` -> ``plan-<hash>.notes.txt``),
  written by :func:`notes_text`; on standard output, where there is no
  companion, they go to standard error;
- a table whose rows are runs or recipes someone might make (a starting
  design, a plan, the candidates of a step, judged recipes) also carries
  the cautions in its last column, ``cautions``, in every row
  (:func:`with_cautions_column`), so that the file sent on its own, or a
  row copied out of it, still carries them.

A companion file rather than header lines, because a reader with default
settings fails on the lines (pandas: "Expected 2 fields in line 8, saw 3")
or, in a spreadsheet, shows them as broken rows; a column as well, because
a companion file can be left behind. :func:`write_csv_text` still writes
comment lines when asked (the simulation and benchmark files use them);
:func:`split_comment_lines` takes such lines off a text for its companion.
"""

from __future__ import annotations

import csv
import hashlib
import io
import numbers
import os
import re
import stat
import tempfile
from collections.abc import Iterable, Mapping, Sequence
from typing import Union

import numpy as np

from guardband.planner.errors import OutputError

__all__ = [
    "CSV_FORMULA_PREFIXES",
    "atomic_write_bytes",
    "atomic_write_text",
    "atomic_write_many",
    "check_output_target",
    "read_regular_file",
    "sha256_file",
    "csv_safe_cell",
    "write_csv_text",
    "CAUTIONS_COLUMN",
    "NOTES_SUFFIX",
    "notes_path",
    "notes_text",
    "with_cautions_column",
    "table_with_notes",
    "split_comment_lines",
]

PathLike = Union[str, "os.PathLike[str]"]

#: Leading characters that make a spreadsheet read a CSV cell as a formula.
#: OWASP "CSV Injection" lists ``= + - @``, tab (0x09) and carriage return
#: (0x0D); OWASP ASVS 5.0 requirement 1.2.10 adds NUL (0x00).
CSV_FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r", "\0")

_READ_CHUNK = 1 << 20


def _current_umask() -> int:
    # os.umask can only be read by setting it; do it once, at import, rather
    # than on every write (setting it is not thread-safe).
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


_UMASK = _current_umask()


def _describe(exc: OSError) -> str:
    return exc.strerror or str(exc) or type(exc).__name__


def _fsync_directory(directory: str) -> None:
    """Sync a folder so that a rename inside it survives a power cut.

    Windows cannot open a folder this way, and some file systems refuse
    ``fsync`` on one; the rename has already happened then, so the failure
    is ignored rather than reported as a failed write.
    """
    if os.name == "nt":  # pragma: no cover - not exercised on POSIX
        return
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _as_bytes(path: str, data: object) -> bytes:
    if isinstance(data, (bytes, bytearray, memoryview)):
        return bytes(data)
    raise TypeError(
        f"data for {path} must be bytes, got {type(data).__name__}; "
        "use atomic_write_text for text"
    )


def _target_mode(path: str) -> int:
    """Permission bits for the new file: the old file's, else 0o666 minus umask."""
    try:
        return stat.S_IMODE(os.stat(path).st_mode)
    except OSError:
        return 0o666 & ~_UMASK


_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a FIFO (named pipe)"),
          (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
          (stat.S_ISSOCK, "a socket"))


def _kind_of(mode: int) -> str:
    return next((name for test, name in _KINDS if test(mode)), "not a regular file")


def check_output_target(path: PathLike) -> None:
    """Refuse to write ``path`` unless it is a new path or a writable regular file.

    A symbolic link is refused, not followed (writing would replace the
    link, or through it its target); so are folders, devices, FIFOs and
    sockets, and a regular file without write permission (a write-protected
    log or table is not silently rewritten).

    Raises
    ------
    OutputError
        Naming the path and what it is; nothing is written.
    """
    path = os.fspath(path)
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        return
    except OSError as exc:
        raise OutputError(f"cannot write {path}: {_describe(exc)}") from exc
    if stat.S_ISLNK(info.st_mode):
        raise OutputError(f"{path} is a symbolic link; refusing to write through it or replace it "
                          "(give a regular file or a new path)")
    if not stat.S_ISREG(info.st_mode):
        raise OutputError(f"{path} is {_kind_of(info.st_mode)}, not a regular file; refusing to "
                          "replace it (give a regular file or a new path)")
    if not info.st_mode & stat.S_IWUSR or not os.access(path, os.W_OK):
        raise OutputError(f"{path} is write-protected; refusing to replace it (nothing was changed)")


def read_regular_file(path: PathLike, *, max_bytes: int, what: str = "file") -> bytes:
    """The bytes of a regular file of at most ``max_bytes``; never follows a final symlink.

    Opened without following a final symbolic link and without blocking (a
    FIFO cannot hang the reader); checked to be a regular file and no
    larger than ``max_bytes`` before anything is read.

    Raises
    ------
    OSError
        With ``strerror`` saying what is wrong (missing, a link, not a
        regular file, too large); callers turn it into their own error.
    """
    path = os.fspath(path)
    flags = os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0)
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        if os.path.islink(path):
            raise OSError(exc.errno, "it is a symbolic link, which is not followed") from None
        raise
    with os.fdopen(fd, "rb") as handle:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise OSError(0, f"it is {_kind_of(info.st_mode)}, not a regular file")
        if info.st_size > max_bytes:
            raise OSError(0, f"it holds {info.st_size} bytes, more than the {what} limit of {max_bytes}")
        data = handle.read(max_bytes + 1)
    if len(data) > max_bytes:
        raise OSError(0, f"it grew beyond the {what} limit of {max_bytes} bytes while being read")
    return data


def _stage(path: str, data: bytes) -> str:
    """Write ``data`` to a synced temporary file next to ``path``; return its name.

    On failure the temporary file is removed and :class:`OutputError` raised.
    """
    directory = os.path.dirname(os.path.abspath(path))
    base = os.path.basename(path)
    try:
        fd, tmp = tempfile.mkstemp(dir=directory, prefix=f".{base}.", suffix=".tmp")
    except OSError as exc:
        raise OutputError(f"could not write {path}: {_describe(exc)}") from exc
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, _target_mode(path))
    except BaseException as exc:
        _remove_quietly(tmp)
        if isinstance(exc, OSError):
            raise OutputError(f"could not write {path}: {_describe(exc)}") from exc
        raise
    return tmp


def _remove_quietly(path: str) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass


def atomic_write_bytes(path: PathLike, data: bytes) -> None:
    """Replace the file at ``path`` with ``data``, all or nothing.

    Parameters
    ----------
    path : str or path-like
        The file to write. Its folder must exist.
    data : bytes
        The complete new content.

    Raises
    ------
    OutputError
        The file could not be written, or ``path`` is refused by
        :func:`check_output_target` (a link, a device, a FIFO, a folder, a
        write-protected file); it is left exactly as it was and no
        temporary file remains.

    Notes
    -----
    Sequence: ``mkstemp`` in the same folder, write, flush, ``os.fsync``,
    ``os.replace`` over the target, then ``fsync`` of the folder where the
    operating system allows it. An existing file's permission bits are kept;
    a new file gets ``0o666`` less the process umask (read at import).
    """
    path = os.fspath(path)
    payload = _as_bytes(path, data)
    check_output_target(path)
    tmp = _stage(path, payload)
    try:
        os.replace(tmp, path)
    except BaseException as exc:
        _remove_quietly(tmp)
        if isinstance(exc, OSError):
            raise OutputError(f"could not write {path}: {_describe(exc)}") from exc
        raise
    _fsync_directory(os.path.dirname(os.path.abspath(path)))


def atomic_write_text(path: PathLike, text: str, *, encoding: str = "utf-8") -> None:
    """Replace the file at ``path`` with ``text``, all or nothing.

    The text is encoded as given (no newline translation), then written with
    :func:`atomic_write_bytes`.

    Parameters
    ----------
    path : str or path-like
        The file to write.
    text : str
        The complete new content.
    encoding : str, default "utf-8"
        Text encoding.

    Raises
    ------
    OutputError
        The file could not be written; it is left exactly as it was.
    """
    if not isinstance(text, str):
        raise TypeError(f"text for {os.fspath(path)} must be str, got {type(text).__name__}")
    atomic_write_bytes(path, text.encode(encoding))


def atomic_write_many(files: Mapping[PathLike, bytes | str]) -> list[str]:
    """Write several files, staging all of them before replacing any.

    Parameters
    ----------
    files : mapping of path to bytes or str
        New content per file; ``str`` values are encoded as UTF-8.

    Returns
    -------
    list of str
        The paths written, in the order they were replaced.

    Raises
    ------
    OutputError
        A file could not be written. The message says which files, if any,
        were already replaced.

    Notes
    -----
    Each file on its own is replaced atomically. The set is not: every
    file is first written and synced to a temporary file, so a failure
    while writing (disk full, permission denied) changes nothing at all;
    but the renames then happen one after another, so a crash or a failed
    rename part-way leaves the earlier files new and the later ones old.
    The error message lists both groups. Readers that need a consistent
    set should check a digest recorded with it (for example in the
    decision log).
    """
    entries: list[tuple[str, bytes]] = []
    seen: dict[str, str] = {}
    for raw_path, content in files.items():
        path = os.fspath(raw_path)
        key = os.path.normcase(os.path.abspath(path))
        if key in seen:
            raise ValueError(f"the same file is listed twice: {seen[key]} and {path}")
        seen[key] = path
        payload = content.encode("utf-8") if isinstance(content, str) else _as_bytes(path, content)
        check_output_target(path)
        entries.append((path, payload))

    staged: list[tuple[str, str]] = []
    try:
        for path, payload in entries:
            staged.append((path, _stage(path, payload)))
    except BaseException:
        for _, tmp in staged:
            _remove_quietly(tmp)
        raise

    done: list[str] = []
    for position, (path, tmp) in enumerate(staged):
        try:
            os.replace(tmp, path)
        except BaseException as exc:
            for _, rest in staged[position:]:
                _remove_quietly(rest)
            if not isinstance(exc, OSError):
                raise
            not_done = [p for p, _ in staged[position:]]
            already = ", ".join(done) if done else "none"
            raise OutputError(
                f"could not write {path}: {_describe(exc)}. "
                f"Already replaced: {already}. Unchanged: {', '.join(not_done)}"
            ) from exc
        done.append(path)
    for directory in sorted({os.path.dirname(os.path.abspath(p)) for p in done}):
        _fsync_directory(directory)
    return done


def sha256_file(path: PathLike) -> str:
    """SHA-256 of a file's bytes.

    Parameters
    ----------
    path : str or path-like
        The file to read.

    Returns
    -------
    str
        64 lowercase hexadecimal digits.

    Raises
    ------
    OSError
        The file cannot be read (missing, no permission).
    """
    digest = hashlib.sha256()
    with open(os.fspath(path), "rb") as handle:
        for chunk in iter(lambda: handle.read(_READ_CHUNK), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _is_number(value: object) -> bool:
    # bool is an int; numpy.bool_ is not a numbers.Number but is not text either.
    return isinstance(value, (numbers.Number, np.number, np.bool_)) and not isinstance(value, str)


def csv_safe_cell(value: object) -> object:
    """Make one CSV cell safe to open in a spreadsheet.

    Follows the OWASP advice on CSV injection: a text cell that starts with
    ``=``, ``+``, ``-``, ``@``, tab, carriage return or NUL (see
    :data:`CSV_FORMULA_PREFIXES`) gets a leading single quote, which the
    spreadsheet reads as "this is text". Quoting of commas, quotes and line
    breaks is left to the :mod:`csv` writer.

    Parameters
    ----------
    value : object
        A cell value.

    Returns
    -------
    object
        Numbers (Python or numpy) and ``None`` unchanged; anything else as a
        ``str``, escaped when needed.

    Notes
    -----
    Only real text is escaped. Our writers pass numeric values as numbers,
    so ``-1.5`` (a float) stays a number, while the string ``"-1.5"`` gets a
    quote like any other text starting with ``-``. Non-text objects other
    than numbers are converted with ``str`` first, because the csv module
    would write that string anyway.
    """
    if value is None or _is_number(value):
        return value
    text = str(value)  # also turns a numpy.str_ into a plain str
    if text.startswith(CSV_FORMULA_PREFIXES):
        return "'" + text
    return text


def _format_cell(value: object, float_format: str | None) -> object:
    value = csv_safe_cell(value)
    if value is None or isinstance(value, str):
        return value
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (numbers.Integral, np.integer)):
        return str(int(value))
    if isinstance(value, (numbers.Real, np.floating)):
        if float_format is not None:
            return format(float(value), float_format)
        if isinstance(value, np.floating) and not isinstance(value, np.float64):
            # str gives the shortest digits that identify the value at its own
            # precision (float32 0.1 -> "0.1"), where float() would add noise.
            return str(value)
        return repr(float(value))
    return str(value)  # complex and other numbers: as Python writes them


_COMMENT_SPLIT = re.compile(r"([,;\t])")


def _safe_comment(line: str) -> str:
    """A comment line that stays harmless when a spreadsheet splits it into cells.

    A spreadsheet does not know our ``#`` comments: it splits the line at
    commas, semicolons or tabs. Every piece after such a separator that
    would start a formula (after spaces) gets the same leading quote as a
    data cell (OWASP CSV-injection advice), and double quotes become single
    ones so that no piece can open a quoted cell running into the next line.
    """
    pieces = _COMMENT_SPLIT.split(line.replace('"', "'"))
    for k in range(2, len(pieces), 2):
        stripped = pieces[k].lstrip(" ")
        if stripped.startswith(CSV_FORMULA_PREFIXES):
            pieces[k] = pieces[k][: len(pieces[k]) - len(stripped)] + "'" + stripped
    return "".join(pieces)


def write_csv_text(
    rows: Iterable[Sequence[object] | Mapping[str, object]],
    header: Sequence[str],
    *,
    comment_lines: Iterable[str] = (),
    float_format: str | None = None,
) -> str:
    """Render a table as CSV text with spreadsheet-safe cells.

    Parameters
    ----------
    rows : iterable of sequences or mappings
        One entry per row: a sequence of ``len(header)`` cells, or a mapping
        from column name to cell (columns missing from it are left empty).
    header : sequence of str
        Column names, written as the first non-comment line.
    comment_lines : iterable of str, optional
        Lines written first, each as ``"# " + line`` (used for cautions).
        A line containing line breaks becomes several comment lines, so a
        comment can never spill into the data.
    float_format : str, optional
        A :func:`format` spec for floats, e.g. ``".10g"``. By default floats
        are written with :func:`repr`, the shortest text that reads back as
        the same float.

    Returns
    -------
    str
        The CSV text, lines ending in ``"\\n"``.

    Raises
    ------
    ValueError
        A row has the wrong number of cells, or a mapping row has a column
        that is not in the header.

    Notes
    -----
    With ``comment_lines`` the text is no longer a plain table: readers must
    skip those lines (``pandas.read_csv(..., comment="#")``). The tables the
    command line writes for people carry none (see the module notes); their
    notes go to a companion file. Every cell, header included, goes through
    :func:`csv_safe_cell`.
    """
    header = [str(name) for name in header]
    buffer = io.StringIO()
    for line in comment_lines:
        for part in str(line).splitlines() or [""]:
            buffer.write(_safe_comment(f"# {part}".rstrip()) + "\n")
    row_buffer = io.StringIO()
    # The csv module quotes a cell only for the characters of its own line
    # terminator, so with "\n" a bare carriage return inside a cell would be
    # left unquoted and split the row for readers. Write each row with
    # "\r\n" (every cell holding CR or LF gets quoted, as RFC 4180 2.6
    # asks) and swap that final terminator for "\n".
    writer = csv.writer(row_buffer, lineterminator="\r\n", quoting=csv.QUOTE_MINIMAL)

    def write_row(cells: list[object]) -> None:
        row_buffer.seek(0)
        row_buffer.truncate()
        writer.writerow(cells)
        buffer.write(row_buffer.getvalue()[:-2] + "\n")

    write_row([csv_safe_cell(name) for name in header])
    width = len(header)
    for number, row in enumerate(rows, start=1):
        if isinstance(row, Mapping):
            unknown = [key for key in row if key not in header]
            if unknown:
                raise ValueError(
                    f"row {number} has columns that are not in the header: {unknown}; "
                    f"header is {header}"
                )
            cells = [row.get(name) for name in header]
        else:
            cells = list(row)
            if len(cells) != width:
                raise ValueError(
                    f"row {number} has {len(cells)} cells but the header has {width} "
                    f"columns ({len(cells)} != {width})"
                )
        write_row([_format_cell(cell, float_format) for cell in cells])
    return buffer.getvalue()


#: The last column of a table whose rows are runs or recipes: the cautions, in every row.
CAUTIONS_COLUMN = "cautions"
#: What replaces a table's last suffix in the name of its companion notes file.
NOTES_SUFFIX = ".notes.txt"


def notes_path(path: PathLike) -> str:
    """The companion notes file of a table: its last suffix replaced by ``.notes.txt``.

    ``plan-1a2b.csv`` -> ``plan-1a2b.notes.txt``; a name without a suffix
    gets ``.notes.txt`` appended. The result always differs from ``path``.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    str
        In the same folder as ``path``.
    """
    path = os.fspath(path)
    folder, name = os.path.split(path)
    stem, dot, _ = name.rpartition(".")
    base = stem if dot and stem else name
    return os.path.join(folder, base + NOTES_SUFFIX)


def notes_text(lines: Iterable[str], cautions: Sequence[str]) -> str:
    """The text of a companion notes file: the notes, then the cautions.

    Parameters
    ----------
    lines : iterable of str
        The notes, in order (a title first). A note holding line breaks
        becomes several lines.
    cautions : sequence of str
        Written under a ``CAUTIONS:`` line, one ``- `` item each; no such
        line when empty (the notes then already hold their cautions).

    Returns
    -------
    str
        Lines ending in ``"\\n"``. Text is kept as given: a text file is
        not read as formulas, so no cell escaping applies.
    """
    out = [part.rstrip() for line in lines for part in (str(line).splitlines() or [""])]
    if cautions:
        out += ["CAUTIONS:", *[f"- {c}" for c in cautions]]
    return "\n".join(out) + "\n"


def with_cautions_column(header: Sequence[str], rows: Iterable[Sequence[object]],
                         cautions: Sequence[str]) -> tuple[list[str], list[list[object]]]:
    """A table with the cautions appended as its last column, in every row.

    Parameters
    ----------
    header : sequence of str
        Must not already hold :data:`CAUTIONS_COLUMN`.
    rows : iterable of sequences
    cautions : sequence of str
        Joined with spaces into one cell (each caution is a sentence).

    Returns
    -------
    header, rows
        New lists; the inputs are not modified.

    Raises
    ------
    ValueError
        The header already has a ``cautions`` column.
    """
    if CAUTIONS_COLUMN in header:
        raise ValueError(f"the table already has a column {CAUTIONS_COLUMN!r}: {list(header)}")
    cell = " ".join(cautions)
    return [*header, CAUTIONS_COLUMN], [[*row, cell] for row in rows]


def table_with_notes(header: Sequence[str], rows: Iterable[Sequence[object]], notes: Iterable[str],
                     cautions: Sequence[str], *, float_format: str | None = None) -> tuple[bytes, bytes]:
    """A table of runs or recipes as written for people: the CSV's bytes and its notes file's bytes.

    Parameters
    ----------
    header : sequence of str
    rows : iterable of sequences
    notes : iterable of str
        The lines that describe the table (a title first).
    cautions : sequence of str
        In the table's last column, in every row (:func:`with_cautions_column`),
        and at the end of the notes (:func:`notes_text`).
    float_format : str, optional
        As :func:`write_csv_text`.

    Returns
    -------
    table, notes : bytes
        UTF-8; the table is a plain CSV table, header and rows only.
    """
    header, rows = with_cautions_column(header, rows, cautions)
    table = write_csv_text(rows, header, float_format=float_format)
    return table.encode("utf-8"), notes_text(notes, cautions).encode("utf-8")


def split_comment_lines(text: str) -> tuple[list[str], str]:
    """Take the leading ``# ...`` lines off a CSV text written by :func:`write_csv_text`.

    Parameters
    ----------
    text : str
        CSV text that may begin with comment lines.

    Returns
    -------
    notes, table
        The comment lines without their ``#`` and one following space, and
        the plain table that follows them.
    """
    lines = text.split("\n")
    k = 0
    while k < len(lines) and lines[k].startswith("#"):
        k += 1
    notes = [line[2:] if line.startswith("# ") else line[1:] for line in lines[:k]]
    return notes, "\n".join(lines[k:])
