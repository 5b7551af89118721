"""The decision log: an append-only, hash-chained JSON Lines file.

Each line is one record, written in canonical JSON (RFC 8785, see
:mod:`guardband.safety.canonical`)::

    {"body":{...},"hash":"<64 hex>","index":3,"kind":"plan",
     "prev":"<64 hex>","time":"2026-01-02T03:04:05.000000Z"}

* ``index`` - position in the log, from 0.
* ``kind`` - what the record is about (``"plan"``, ``"correction"``, ...).
* ``time`` - ISO-8601 UTC time of writing.
* ``prev`` - the ``hash`` of the record before (64 zeros for record 0).
* ``body`` - the content, any JSON object.
* ``hash`` - SHA-256 of the canonical form of the record without ``hash``.

The head hash is the ``hash`` of the last record (64 zeros for an empty
log). Because each record's hash covers its ``prev``, changing, removing,
inserting or reordering any record breaks the chain at that point, and
:func:`verify` names the first record where it breaks. What the chain
alone cannot show is a log cut short at the end, or one rewritten from some
record onwards with every later hash recomputed: for those, compare with a
head hash and record count kept elsewhere (every report prints them) by
passing ``expect_head`` / ``expect_count``.

Writers take a lock file (``<log>.lock``, left in place afterwards) and
replace the whole log atomically, so readers never need the lock: they see
the old file or the new one.

Records are never changed. A mistake is put right by appending a record of
kind ``"correction"`` whose body names the superseded record
(``"supersedes"``) and says why (``"reason"``); see :func:`effective_records`.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import re
from collections.abc import Iterator, Mapping
from datetime import datetime, timezone
from typing import Any, Union

import filelock

from guardband.planner.errors import OutputError, VerificationError
from guardband.planner.app.fileio import atomic_write_bytes, check_output_target
from guardband.planner.inputs.reading import read_regular_bytes
from guardband.planner.settings import MAX_LOG_BYTES
from guardband.safety.canonical import canonical_json, canonical_string, to_jsonable, write_canonical

__all__ = [
    "GENESIS_HASH",
    "CORRECTION",
    "LOCK_TIMEOUT",
    "VerifyResult",
    "record_hash",
    "append_record",
    "locked",
    "read_records",
    "verify",
    "verify_or_raise",
    "head_and_count",
    "effective_records",
]

PathLike = Union[str, "os.PathLike[str]"]

#: ``prev`` of the first record, and the head hash of an empty log.
GENESIS_HASH = "0" * 64
#: The record kind that supersedes an earlier record.
CORRECTION = "correction"
#: Seconds to wait for another writer's lock before giving up.
LOCK_TIMEOUT = 10.0

_RECORD_KEYS = frozenset({"index", "kind", "time", "prev", "body", "hash"})
_KIND_PATTERN = re.compile(r"[a-z][a-z0-9_]*\Z")
_HEX64 = re.compile(r"[0-9a-f]{64}\Z")


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def record_hash(record: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of the canonical form of ``record`` without its ``"hash"`` key."""
    return _sha256(canonical_json({k: v for k, v in record.items() if k != "hash"}))


# ---------------------------------------------------------------------------
# Reading and checking
# ---------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class VerifyResult:
    """Outcome of :func:`verify`.

    Attributes
    ----------
    ok : bool
        True when every record checks out and the expectations hold.
    count : int
        Number of records that verified, in order from the start (all of
        them when ``ok``).
    head : str
        Hash of the last record that verified (64 zeros if none).
    first_bad : int or None
        0-based position of the first bad or missing record, None when
        ``ok`` or when the position cannot be known.
    problem : str
        A plain sentence saying what is wrong; empty when ``ok``.
    line : int or None
        1-based line number of the first bad line, when the problem is on a
        line of the file.
    """

    ok: bool
    count: int
    head: str
    first_bad: int | None = None
    problem: str = ""
    line: int | None = None

    def to_dict(self) -> dict[str, Any]:
        """The result as a plain dict (for JSON output)."""
        return dataclasses.asdict(self)


class _LineError(Exception):
    """A line of the log that is not a JSON object."""


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON number")


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"the key {key!r} appears twice")
        out[key] = value
    return out


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"the number {text} is too large for a double")
    return value


def _parse_line(raw: bytes) -> dict[str, Any]:
    if not raw.strip():
        raise _LineError("is blank")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _LineError(f"is not valid UTF-8 text (byte {exc.start})") from None
    try:
        obj = json.loads(
            text,
            parse_constant=_reject_constant,
            parse_float=_finite_float,
            object_pairs_hook=_unique_keys,
        )
    except ValueError as exc:
        raise _LineError(f"is not valid JSON ({exc})") from None
    except RecursionError:
        raise _LineError("nests arrays or objects too deeply to read (no record of ours does)") from None
    if not isinstance(obj, dict):
        raise _LineError(f"is not a JSON object (found {type(obj).__name__})")
    return obj


def _split_lines(data: bytes) -> tuple[list[bytes], bool]:
    """Lines of ``data`` without their newlines, and whether the last one was complete."""
    if not data:
        return [], True
    lines = data.split(b"\n")
    if data.endswith(b"\n"):
        return lines[:-1], True
    return lines, False


def _read_bytes(path: str) -> bytes:
    # a regular file only, never blocking on a FIFO, and of bounded size
    return read_regular_bytes(path, MAX_LOG_BYTES)


def read_records(path: PathLike) -> list[dict[str, Any]]:
    """Parse a decision log into a list of records, without checking the chain.

    Parameters
    ----------
    path : str or path-like
        The log file.

    Returns
    -------
    list of dict
        One dict per line, in file order.

    Raises
    ------
    VerificationError
        The file cannot be read, or a line is blank or not a JSON object;
        the message gives the line number. Use :func:`verify` to check the
        hashes.
    """
    path = os.fspath(path)
    try:
        data = _read_bytes(path)
    except OSError as exc:
        raise VerificationError(
            f"cannot read decision log {path}: {exc.strerror or exc}"
        ) from exc
    lines, _ = _split_lines(data)
    records = []
    for number, raw in enumerate(lines, start=1):
        try:
            records.append(_parse_line(raw))
        except _LineError as exc:
            raise VerificationError(f"decision log {path}, line {number} {exc}") from None
    return records


def _structure_problem(record: dict[str, Any]) -> str | None:
    keys = set(record)
    if keys != _RECORD_KEYS:
        missing = sorted(_RECORD_KEYS - keys)
        extra = sorted(keys - _RECORD_KEYS)
        parts = []
        if missing:
            parts.append(f"missing {', '.join(missing)}")
        if extra:
            parts.append(f"unexpected {', '.join(extra)}")
        return "; ".join(parts)
    index = record["index"]
    if not isinstance(index, int) or isinstance(index, bool) or index < 0:
        return f"index {index!r} is not a whole number >= 0"
    kind = record["kind"]
    if not isinstance(kind, str) or not _KIND_PATTERN.match(kind):
        return f"kind {kind!r} is not a lower-case word"
    if not isinstance(record["time"], str) or _parse_time(record["time"]) is None:
        return f"time {record['time']!r} is not an ISO-8601 time with a time zone"
    for key in ("prev", "hash"):
        if not isinstance(record[key], str) or not _HEX64.match(record[key]):
            return f"{key} is not 64 lower-case hexadecimal digits"
    if not isinstance(record["body"], dict):
        return "body is not a JSON object"
    return None


def _meaning_problem(record: dict[str, Any], position: int) -> str | None:
    body = record["body"]
    if "supersedes" in body:
        target = body["supersedes"]
        if not isinstance(target, int) or isinstance(target, bool) or not 0 <= target < position:
            return (
                f"record {position} supersedes record {target!r}, "
                "which does not come before it"
            )
        if not _nonempty_text(body.get("reason")):
            return f"record {position} supersedes record {target} without a reason"
    elif record["kind"] == CORRECTION:
        return f"record {position} is a correction that does not name the record it supersedes"
    return None


def _nonempty_text(value: Any) -> bool:
    return isinstance(value, str) and bool(value.strip())


def _plural(n: int) -> str:
    return f"{n} record" if n == 1 else f"{n} records"


def _record_texts(record: dict[str, Any]) -> tuple[bytes, bytes]:
    """Canonical bytes of a parsed record without and with its hash.

    Same result as ``canonical_json`` (keys sort as body, hash, index, kind,
    prev, time), but the body is written once for both and the values,
    already plain JSON, skip :func:`to_jsonable`.
    """
    parts = ['{"body":']
    write_canonical(record["body"], parts)
    head = "".join(parts)
    rest = (
        f',"index":{int.__repr__(record["index"])},"kind":{canonical_string(record["kind"])}'
        f',"prev":{canonical_string(record["prev"])},"time":{canonical_string(record["time"])}}}'
    )
    unhashed = (head + rest).encode("utf-8")
    full = (head + ',"hash":' + canonical_string(record["hash"]) + rest).encode("utf-8")
    return unhashed, full


def _check_chain(data: bytes) -> tuple[list[dict[str, Any]], VerifyResult]:
    """Walk the records in ``data``; return the good prefix and the result."""
    lines, last_complete = _split_lines(data)
    good: list[dict[str, Any]] = []
    head = GENESIS_HASH

    def bad(position: int, problem: str) -> VerifyResult:
        return VerifyResult(
            ok=False, count=len(good), head=head, first_bad=position,
            problem=problem, line=position + 1,
        )

    for position, raw in enumerate(lines):
        number = position + 1
        if position == len(lines) - 1 and not last_complete:
            return good, bad(
                position,
                f"line {number} (record {position}) is a partial last line: the file does "
                "not end with a newline (an interrupted write or a cut file)",
            )
        try:
            record = _parse_line(raw)
        except _LineError as exc:
            return good, bad(position, f"line {number} (record {position}) {exc}")
        problem = _structure_problem(record)
        if problem:
            return good, bad(position, f"record {position} (line {number}) is malformed: {problem}")
        try:
            unhashed, canonical_line = _record_texts(record)
        except UnicodeEncodeError:  # a lone surrogate escape such as "\ud800"
            return good, bad(
                position,
                f"record {position} (line {number}) is malformed: it holds text that is "
                "not valid Unicode",
            )
        if record["hash"] != _sha256(unhashed):
            return good, bad(
                position, f"record {position} was edited: its hash does not match its content"
            )
        if raw != canonical_line:
            return good, bad(
                position,
                f"record {position} is not stored in canonical form "
                "(the line was re-formatted or edited)",
            )
        if record["index"] != position:
            return good, bad(
                position,
                f"record {position} is missing or out of order: expected index {position}, "
                f"found {record['index']}",
            )
        if record["prev"] != head:
            if position == 0:
                problem = "record 0 does not start the log: its prev hash is not 64 zeros"
            else:
                problem = (
                    f"record {position} does not follow record {position - 1}: prev hash "
                    "differs (one of the two was changed or replaced)"
                )
            return good, bad(position, problem)
        problem = _meaning_problem(record, position)
        if problem:
            return good, bad(position, problem)
        good.append(record)
        head = record["hash"]
    return good, VerifyResult(ok=True, count=len(good), head=head)


def _check_expectations(
    good: list[dict[str, Any]],
    result: VerifyResult,
    expect_head: str | None,
    expect_count: int | None,
) -> VerifyResult:
    count, head = result.count, result.head
    if expect_count is not None and count != expect_count:
        if count < expect_count:
            problem = f"log has {_plural(count)}, expected {expect_count} (truncated?)"
            first_bad = count
        else:
            problem = (
                f"log has {_plural(count)}, expected {expect_count} "
                "(records were added after the expected head?)"
            )
            first_bad = expect_count
        return dataclasses.replace(result, ok=False, first_bad=first_bad, problem=problem)
    if expect_head is not None and head != expect_head:
        where = next((r["index"] for r in good if r["hash"] == expect_head), None)
        if where is None:
            problem = (
                "head hash differs from the expected head: no record in the log has the "
                "expected hash (the log was cut short or rewritten)"
            )
            first_bad = None
        else:
            following = count - 1 - where
            verb = "follows" if following == 1 else "follow"
            problem = (
                f"head hash differs from the expected head: the expected head is record "
                f"{where}, and {_plural(following)} {verb} it"
            )
            first_bad = where + 1
        return dataclasses.replace(result, ok=False, first_bad=first_bad, problem=problem)
    return result


def _check_expect_args(expect_head: str | None, expect_count: int | None) -> str | None:
    if expect_head is not None:
        if not isinstance(expect_head, str) or not _HEX64.match(expect_head.strip().lower()):
            raise ValueError(
                f"expect_head must be 64 hexadecimal digits, got {expect_head!r}"
            )
        expect_head = expect_head.strip().lower()
    if expect_count is not None:
        if not isinstance(expect_count, int) or isinstance(expect_count, bool) or expect_count < 0:
            raise ValueError(f"expect_count must be a whole number >= 0, got {expect_count!r}")
    return expect_head


def verify(
    path: PathLike,
    *,
    expect_head: str | None = None,
    expect_count: int | None = None,
) -> VerifyResult:
    """Check a decision log record by record.

    Parameters
    ----------
    path : str or path-like
        The log file. An empty file is a valid log with no records.
    expect_head : str, optional
        Head hash printed by an earlier report; the log must still end there.
    expect_count : int, optional
        Number of records the log must have.

    Returns
    -------
    VerifyResult
        ``ok`` and, if not, the first bad position and a sentence saying
        what is wrong: a blank, partial or non-JSON line; an edited record
        (hash does not match); a record missing or out of order (wrong
        index); a record that does not follow the one before (wrong prev);
        a correction pointing nowhere; too few or too many records; a
        different head.

    Raises
    ------
    ValueError
        ``expect_head`` or ``expect_count`` is malformed.
    """
    expect_head = _check_expect_args(expect_head, expect_count)
    path = os.fspath(path)
    try:
        data = _read_bytes(path)
    except OSError as exc:
        return VerifyResult(
            ok=False, count=0, head=GENESIS_HASH,
            problem=f"the decision log {path} cannot be read: {exc.strerror or exc}",
        )
    good, result = _check_chain(data)
    if not result.ok:
        return result
    return _check_expectations(good, result, expect_head, expect_count)


def verify_or_raise(
    path: PathLike,
    *,
    expect_head: str | None = None,
    expect_count: int | None = None,
) -> VerifyResult:
    """Like :func:`verify`, but raise :class:`VerificationError` when the log fails.

    Returns
    -------
    VerifyResult
        The (passing) result.

    Raises
    ------
    VerificationError
        The message names the log and says what is wrong.
    """
    result = verify(path, expect_head=expect_head, expect_count=expect_count)
    if not result.ok:
        raise VerificationError(
            f"decision log {os.fspath(path)} failed verification: {result.problem}"
        )
    return result


def head_and_count(path: PathLike) -> tuple[str, int]:
    """Head hash and record count of a verified log, for reports.

    A log file that does not exist yet counts as empty:
    ``("0" * 64, 0)``.

    Raises
    ------
    VerificationError
        The log exists but fails verification.
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        return GENESIS_HASH, 0
    result = verify_or_raise(path)
    return result.head, result.count


def effective_records(records: list[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Mark the records that a later record supersedes.

    Parameters
    ----------
    records : list of dict
        Records of a verified log, as from :func:`read_records`.

    Returns
    -------
    list of dict
        Copies of the records, each with an extra key ``"superseded_by"``:
        the index of the latest record that supersedes it, or None. A
        correction can itself be superseded; nothing is "un-superseded".
        The input records are not changed.

    Raises
    ------
    ValueError
        A record supersedes an index that is not an earlier record in the list.
    """
    out = [{**record, "superseded_by": None} for record in records]
    position_of = {record["index"]: position for position, record in enumerate(records)}
    for position, record in enumerate(records):
        body = record.get("body")
        if not isinstance(body, Mapping) or "supersedes" not in body:
            continue
        target = body["supersedes"]
        target_position = position_of.get(target) if isinstance(target, int) else None
        if target_position is None or target_position >= position:
            raise ValueError(
                f"record {record['index']} supersedes {target!r}, "
                "which is not an earlier record in this list"
            )
        out[target_position]["superseded_by"] = record["index"]
    return out


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------


def _parse_time(text: str) -> datetime | None:
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        return None
    if moment.tzinfo is None or moment.utcoffset() is None:
        return None
    return moment


def _format_time(time: datetime | str | None) -> str:
    if time is None:
        moment = datetime.now(timezone.utc)
    elif isinstance(time, datetime):
        if time.tzinfo is None or time.utcoffset() is None:
            raise ValueError(
                f"time {time.isoformat()} has no time zone; pass an aware datetime "
                "such as datetime.now(timezone.utc)"
            )
        moment = time
    elif isinstance(time, str):
        parsed = _parse_time(time)
        if parsed is None:
            raise ValueError(
                f"time {time!r} is not an ISO-8601 time with a time zone, "
                "e.g. '2026-01-02T03:04:05Z'"
            )
        moment = parsed
    else:
        raise TypeError(f"time must be a datetime, a str or None, got {type(time).__name__}")
    return moment.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _build_body(
    kind: str, body: Mapping[str, Any], supersedes: int | None, reason: str | None
) -> dict[str, Any]:
    if not isinstance(kind, str) or not _KIND_PATTERN.match(kind):
        raise ValueError(
            f"kind must be a lower-case word such as 'plan' or 'correction', got {kind!r}"
        )
    if not isinstance(body, Mapping):
        raise TypeError(f"body must be a mapping (dict), got {type(body).__name__}")
    out = to_jsonable(body, path="body")
    for key, value in (("supersedes", supersedes), ("reason", reason)):
        if value is None:
            continue
        if key in out and out[key] != value:
            raise ValueError(
                f"{key}={value!r} disagrees with body[{key!r}]={out[key]!r}; give it once"
            )
        out[key] = value
    if "supersedes" in out:
        target = out["supersedes"]
        if not isinstance(target, int) or isinstance(target, bool) or target < 0:
            raise ValueError(f"supersedes must be a record index (int >= 0), got {target!r}")
        if not _nonempty_text(out.get("reason")):
            raise ValueError(
                f"superseding record {target} needs a reason: pass reason='...' "
                "saying what was wrong"
            )
    elif kind == CORRECTION:
        raise ValueError(
            "a correction must name the record it supersedes: pass supersedes=<index> "
            "and reason='...'"
        )
    return out


@contextlib.contextmanager
def locked(path: PathLike, timeout: float = LOCK_TIMEOUT) -> Iterator[None]:
    """Hold the writers' lock of a decision log (``<log>.lock``) for the ``with`` block.

    Raises
    ------
    OutputError
        The lock path is a folder, a link or another non-regular file, or
        the lock could not be taken within ``timeout`` seconds.
    """
    lock_path = os.fspath(path) + ".lock"
    try:
        check_output_target(lock_path)
    except OutputError as exc:
        raise OutputError(f"the lock file of the decision log is refused: {exc}") from None
    lock = filelock.FileLock(lock_path, timeout=timeout)
    try:
        lock.acquire()
    except filelock.Timeout as exc:
        raise OutputError(
            f"could not lock {lock_path} within {timeout:g} s: another process may be "
            "writing the decision log; try again"
        ) from exc
    except OSError as exc:
        raise OutputError(f"cannot take the lock {lock_path}: {exc.strerror or exc}") from exc
    try:
        yield
    finally:
        lock.release()


def append_record(
    path: PathLike,
    kind: str,
    body: Mapping[str, Any],
    *,
    time: datetime | str | None = None,
    supersedes: int | None = None,
    reason: str | None = None,
    lock_timeout: float = LOCK_TIMEOUT,
    lock_held: bool = False,
) -> dict[str, Any]:
    """Append one record to the decision log, creating the log if needed.

    Parameters
    ----------
    path : str or path-like
        The log file; its folder must exist.
    kind : str
        Lower-case word: ``"plan"``, ``"correction"``, ...
    body : mapping
        The record's content (converted with :func:`to_jsonable`; the
        caller's object is not changed).
    time : datetime or str, optional
        Time of the record, timezone-aware; default now. Stored in UTC.
    supersedes : int, optional
        Index of an earlier record this one replaces; stored in the body.
        Required, with ``reason``, for kind ``"correction"``.
    reason : str, optional
        Why; stored in the body. Required and non-empty with ``supersedes``.
    lock_timeout : float, default LOCK_TIMEOUT
        Seconds to wait for another writer.
    lock_held : bool, default False
        The caller already holds :func:`locked` for this log (to write
        other files under the same lock); no lock is taken here.

    Returns
    -------
    dict
        The record as written.

    Raises
    ------
    VerificationError
        The existing log fails verification; nothing is written.
    OutputError
        The lock could not be taken in time, or the file could not be
        written; the log is unchanged.
    ValueError
        A bad kind, time or body value (NaN, ...), a correction without
        ``supersedes`` or ``reason``, or ``supersedes`` naming a record that
        does not exist.

    Notes
    -----
    Under a lock file (``path + ".lock"``), the whole existing log is read
    and verified, and then the whole file (old bytes plus the new line) is
    written with :func:`planner.fileio.atomic_write_bytes`. Rewriting
    rather than appending in place costs a copy of the log per record, but
    logs are small (kilobytes to a few megabytes), and in exchange a crash
    at any moment leaves either the old log or the new one, never a half
    line; the verification on the way in is a full read anyway.
    """
    path = os.fspath(path)
    content = _build_body(kind, body, supersedes, reason)
    stamp = _format_time(time)
    with contextlib.nullcontext() if lock_held else locked(path, lock_timeout):
        check_output_target(path)  # before reading: a FIFO or a link is refused, not read
        try:
            data = _read_bytes(path)
        except FileNotFoundError:
            data = b""
        except OSError as exc:
            raise OutputError(
                f"cannot read decision log {path}: {exc.strerror or exc}"
            ) from exc
        _, existing = _check_chain(data)
        if not existing.ok:
            raise VerificationError(
                f"refusing to append to decision log {path}: {existing.problem}. "
                "The file was not changed"
            )
        target = content.get("supersedes")
        if target is not None and target >= existing.count:
            raise ValueError(
                f"supersedes={target} does not name an earlier record: the log has "
                f"{_plural(existing.count)}"
                + (f" (0 to {existing.count - 1})" if existing.count else "")
            )
        record: dict[str, Any] = {
            "index": existing.count,
            "kind": kind,
            "time": stamp,
            "prev": existing.head,
            "body": content,
        }
        record["hash"] = record_hash(record)
        atomic_write_bytes(path, data + canonical_json(record) + b"\n")
    return record
