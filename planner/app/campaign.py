"""The files of a campaign folder: which a record names, checking them, and writing a step's.

A plan record names six files by path (relative to the folder that holds
the log) and SHA-256: the plan table, the exclusion table, the notes file of
each (``plan_notes``, ``exclusion_notes``) and the copies of the protocol
and runs files under ``inputs/``; a judge record its table, the table's
notes and its three input copies. This module

- lists them (:func:`named_files`) and checks every one against its hash,
  and lists the files in the folder that no record names
  (:func:`check_folder`);
- reads an input copy for a replay only from inside ``inputs/``, as a
  regular file of bounded size (:func:`read_input_copy`);
- writes a planning step's files so that a step that does not reach the
  log leaves none of them behind (:func:`commit_step`): under the log's
  lock, each file is first written under a hidden pending name, the record
  is appended, and only then are the pending files renamed into place. A
  failure before the append removes them. A process killed after the
  append but before the renames leaves complete pending files, which the
  next writer puts in place (:func:`settle`) before anything else; pending
  files that no record names are removed then.
"""

from __future__ import annotations

import hashlib
import os
import stat
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any, Callable, Mapping

from guardband.planner.errors import OutputError, VerificationError
from guardband.planner.app.fileio import atomic_write_bytes, check_output_target, read_regular_file
from guardband.planner.settings import CAMPAIGN_FILE_MAX_BYTES
from guardband.safety import ledger

__all__ = [
    "INPUTS",
    "NamedFile",
    "FolderCheck",
    "named_files",
    "check_folder",
    "read_input_copy",
    "pending_name",
    "settle",
    "commit_step",
]

#: Sub-folder of a campaign that holds the input copies.
INPUTS = "inputs"
_PENDING = ".pending.tmp"
_STEP_PREFIXES = ("plan-", "exclusions-", "judge-")
_REPORT_PREFIXES = ("report-", "figures-")


@dataclass(frozen=True)
class NamedFile:
    """A file a record names: where, its SHA-256, which record and field."""

    path: str  # relative to the campaign folder, with "/"
    sha256: str
    record: int
    field: str


_FIELDS = (("plan_table", "file"), ("plan_notes", "file"), ("exclusion_table", "file"),
           ("exclusion_notes", "file"), ("judge_table", "file"), ("judge_notes", "file"),
           ("protocol_file", "copy"), ("runs_file", "copy"), ("recipes_file", "copy"))


def _relative(value: Any, where: str) -> str:
    """A record's file path checked to stay inside the campaign folder."""
    if not isinstance(value, str) or not value or "\\" in value or "\0" in value:
        raise VerificationError(f"{where} is not a plain relative file path: {value!r}")
    pure = PurePosixPath(value)
    if pure.is_absolute() or any(part in ("..", ".", "") for part in value.split("/")):
        raise VerificationError(f"{where} names {value!r}, which is not inside the campaign folder "
                                "(absolute paths and '..' are refused)")
    return pure.as_posix()


def named_files(records: list[Mapping[str, Any]]) -> list[NamedFile]:
    """Every file the records name, in log order.

    Raises
    ------
    VerificationError
        A record names a path outside the campaign folder, or a file
        without a 64-digit SHA-256.
    """
    out = []
    for rec in records:
        body = rec.get("body") or {}
        for key, part in _FIELDS:
            entry = body.get(key)
            if not isinstance(entry, Mapping) or part not in entry:
                continue
            where = f"record {rec['index']} field {key}.{part}"
            path = _relative(entry[part], where)
            sha = entry.get("sha256")
            if not isinstance(sha, str) or len(sha) != 64:
                raise VerificationError(f"{where}: the record gives no SHA-256 for {path}")
            out.append(NamedFile(path, sha, int(rec["index"]), key))
    return out


@dataclass
class FolderCheck:
    """What :func:`check_folder` found. ``problems`` fail verification; ``notes`` do not."""

    checked: int = 0
    problems: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    unnamed: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def to_dict(self) -> dict:
        return {"checked": self.checked, "ok": self.ok, "problems": list(self.problems),
                "notes": list(self.notes), "unnamed": list(self.unnamed)}


def _digest_of(path: Path) -> str:
    digest = hashlib.sha256()
    flags = os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0)
    with os.fdopen(os.open(path, flags), "rb") as handle:
        if not stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
            raise OSError(0, "not a regular file")
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _check_named(folder: Path, item: NamedFile) -> str | None:
    path = folder / item.path
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        hint = ""
        if (path.parent / pending_name(path.name)).exists():
            hint = (" (an interrupted step left its pending copy; the next `guardband plan` "
                    "into this folder puts it in place)")
        return f"{item.path} (record {item.record}, {item.field}) is missing{hint}"
    except OSError as exc:
        return f"{item.path} (record {item.record}, {item.field}) cannot be read: {exc.strerror or exc}"
    if not stat.S_ISREG(info.st_mode):
        return f"{item.path} (record {item.record}, {item.field}) is not a regular file"
    try:
        sha = _digest_of(path)
    except OSError as exc:
        return f"{item.path} (record {item.record}, {item.field}) cannot be read: {exc.strerror or exc}"
    if sha != item.sha256:
        return (f"{item.path} (record {item.record}, {item.field}) was altered: its SHA-256 "
                "differs from the record")
    return None


def _all_entries(folder: Path) -> list[str]:
    """The entries a campaign layout can hold: the folder's own, and those of ``inputs/``.

    Relative paths with "/"; a sub-folder other than ``inputs/`` is one
    entry (reports keep their figures in ``figures-<label>/``), and links
    are entries, never followed.
    """
    out = []
    for path in sorted(folder.iterdir()):
        if path.name == INPUTS and path.is_dir() and not path.is_symlink():
            out.extend(f"{INPUTS}/{inner.name}" for inner in sorted(path.iterdir()))
        else:
            out.append(path.name)
    return out


def _is_step_like(rel: str) -> bool:
    parts = rel.split("/")
    name = parts[-1].lstrip(".")
    return parts[0] == INPUTS or (len(parts) == 1 and name.startswith(_STEP_PREFIXES))


def check_folder(folder: str | Path, records: list[Mapping[str, Any]], *, log_name: str) -> FolderCheck:
    """Check every file the records name, and list the files no record names.

    Problems (verification fails): a named file missing, altered, or not a
    regular file; a file that looks like a step's (``plan-*``,
    ``exclusions-*``, anything under ``inputs/``) that no record names.
    Notes: other files no record names (reports, the demo's copies, your
    own files), and temporary files left by an interrupted write.
    """
    folder = Path(folder)
    result = FolderCheck()
    items = named_files(records)
    seen: set[str] = set()
    for item in items:
        if item.path in seen:
            continue
        seen.add(item.path)
        result.checked += 1
        problem = _check_named(folder, item)
        if problem:
            result.problems.append(problem)
    ignore = {log_name, log_name + ".lock"}
    reports = 0
    for rel in _all_entries(folder):
        if rel in seen or rel in ignore:
            continue
        name = rel.rsplit("/", 1)[-1]
        if name.startswith(".") and name.endswith(".tmp"):
            result.notes.append(f"{rel} is a temporary file left by an interrupted write "
                                "(the next `guardband plan` into this folder removes it)")
        elif _is_step_like(rel):
            result.unnamed.append(rel)
            result.problems.append(f"{rel} is not named by any record (a step file that never "
                                   "reached the log, or one added later)")
        elif rel.startswith(_REPORT_PREFIXES):
            reports += 1
        else:
            result.unnamed.append(rel)
            result.notes.append(f"{rel} is not named by any record")
    if reports:
        result.notes.append(f"{reports} report file(s) (report-*, figures-*) are not named by any "
                            "record; `guardband report` rebuilds them from the log")
    return result


def read_input_copy(folder: str | Path, entry: Any, *, where: str) -> tuple[Path, bytes]:
    """The path and bytes of an input copy a record names, checked against its hash.

    The copy must be a regular file directly under ``inputs/`` of the
    campaign folder (no ``..``, no absolute path, no link, no device or
    FIFO) and at most ``CAMPAIGN_FILE_MAX_BYTES`` long.

    Raises
    ------
    VerificationError
        Naming the record field and the file.
    """
    folder = Path(folder)
    if not isinstance(entry, Mapping):
        raise VerificationError(f"{where} does not name an input copy")
    rel = _relative(entry.get("copy"), f"{where}.copy")
    parts = rel.split("/")
    if len(parts) != 2 or parts[0] != INPUTS:
        raise VerificationError(f"{where}.copy names {rel!r}, which is not a file directly under "
                                f"the campaign's {INPUTS}/ folder")
    path = folder / rel
    try:
        data = read_regular_file(path, max_bytes=CAMPAIGN_FILE_MAX_BYTES, what="input copy")
    except FileNotFoundError:
        raise VerificationError(f"{where}: the input copy {rel} is missing") from None
    except OSError as exc:
        raise VerificationError(f"{where}: the input copy {rel} is refused: {exc.strerror or exc}") from None
    if hashlib.sha256(data).hexdigest() != entry.get("sha256"):
        raise VerificationError(f"{where}: the input copy {rel} was altered (its SHA-256 differs "
                                "from the record)")
    return path, data


# ------------------------------------------------------------------ writing
def _same_file(path: Path, data: bytes) -> bool:
    """Whether ``path`` is a regular file (not a link) holding exactly ``data``."""
    try:
        return os.lstat(path).st_size == len(data) and _digest_of(path) == hashlib.sha256(data).hexdigest()
    except OSError:
        return False


def pending_name(name: str) -> str:
    """The hidden name a step file waits under until its record is in the log."""
    return f".{name}{_PENDING}"


def _final_of(pending: str) -> str | None:
    if pending.startswith(".") and pending.endswith(_PENDING):
        return pending[1:-len(_PENDING)]
    return None


def _leftovers(folder: Path, log_name: str) -> list[Path]:
    """Hidden temporary files of step files and of the log (never a report's)."""
    out = []
    for base in (folder, folder / INPUTS):
        if not base.is_dir():
            continue
        for path in base.iterdir():
            name = path.name
            if not (name.startswith(".") and name.endswith(".tmp")):
                continue
            inner = name.lstrip(".")
            if base != folder or inner.startswith((*_STEP_PREFIXES, log_name)):
                out.append(path)
    return out


def settle(folder: Path, log_path: Path) -> list[str]:
    """Finish or undo what an interrupted step left; call under the log's lock.

    A pending file whose final name a record names, with the recorded hash,
    and whose final file is missing is renamed into place; every other
    leftover temporary file of a step or of the log is removed.

    Returns
    -------
    list of str
        The files put in place (relative paths).
    """
    records = ledger.read_records(log_path) if log_path.exists() else []
    wanted = {item.path: item.sha256 for item in named_files(records)}
    placed = []
    for path in _leftovers(folder, log_path.name):
        final = _final_of(path.name)
        rel = (path.parent / final).relative_to(folder).as_posix() if final else None
        try:
            if not stat.S_ISREG(os.lstat(path).st_mode):
                continue  # not ours to remove; verify names it
            if rel in wanted and not os.path.lexists(path.parent / final) \
                    and _digest_of(path) == wanted[rel]:
                os.replace(path, path.parent / final)
                placed.append(rel)
            else:
                path.unlink()
        except OSError:
            continue  # left for verify to name; the step's own files are checked next
    return placed


def commit_step(
    folder: Path,
    log_path: Path,
    files: Mapping[Path, bytes],
    kind: str,
    body: Mapping[str, Any],
    *,
    fault: Callable[[str], None] | None = None,
) -> dict:
    """Write a step's files and append its record, all or nothing.

    Under the log's lock: leftovers of an interrupted step are settled;
    the folder must pass :func:`check_folder`; every target not already in
    place with the same bytes is checked (:func:`check_output_target`) and
    written under its pending name; the record is appended; the pending
    files are renamed into place. If anything fails before the append, the
    pending files are removed and the log is unchanged.

    ``fault`` is called with the name of each phase (``"staged"``,
    ``"appended"``) so that tests can interrupt the sequence there.
    """
    staged: list[tuple[Path, Path]] = []
    with ledger.locked(log_path):
        settle(folder, log_path)
        if log_path.exists():
            found = check_folder(folder, ledger.read_records(log_path), log_name=log_path.name)
            if not found.ok:
                raise VerificationError(f"refusing to add a step to the campaign folder {folder}: "
                                        + "; ".join(found.problems))
        # a file already in place with the same bytes (the same inputs as an
        # earlier step) is left as it is, even if write-protected
        todo = {target: data for target, data in files.items() if not _same_file(target, data)}
        for target in todo:
            check_output_target(target)
        try:
            for target, data in todo.items():
                pending = target.parent / pending_name(target.name)
                staged.append((pending, target))
                atomic_write_bytes(pending, data)
            if fault:
                fault("staged")
            record = ledger.append_record(log_path, kind, body, lock_held=True)
        except BaseException:
            for pending, _ in staged:
                pending.unlink(missing_ok=True)
            raise
        if fault:
            fault("appended")
        for pending, target in staged:
            try:
                os.replace(pending, target)
            except OSError as exc:
                raise OutputError(
                    f"record {record['index']} is in the log, but {target} could not be put in place "
                    f"({exc.strerror or exc}); its complete copy is {pending.name}, which the next "
                    "`guardband plan` into this folder puts in place") from exc
    return record
