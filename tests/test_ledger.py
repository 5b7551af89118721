"""The decision log: the hash chain, tamper detection, corrections, locking."""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import re
from datetime import datetime, timedelta, timezone

import filelock
import numpy as np
import pytest

from guardband.planner.app import fileio
from guardband.planner.errors import EXIT_VERIFY, OutputError, VerificationError
from guardband.safety import ledger
from guardband.safety.canonical import canonical_json
from guardband.safety.ledger import (
    GENESIS_HASH,
    append_record,
    effective_records,
    head_and_count,
    read_records,
    record_hash,
    verify,
    verify_or_raise,
)

T0 = datetime(2026, 3, 1, 9, 30, tzinfo=timezone.utc)


# --------------------------------------------------------------------------
# The chain
# --------------------------------------------------------------------------


def _write_five(path):
    return [
        append_record(path, "plan", {"step": i, "runs": [i, i + 0.5]}, time=T0 + timedelta(minutes=i))
        for i in range(5)
    ]


@pytest.fixture
def log5(tmp_path):
    path = tmp_path / "decisions.jsonl"
    return path, _write_five(path)


def _lines(path) -> list[bytes]:
    return path.read_bytes().split(b"\n")[:-1]


def _put_lines(path, lines: list[bytes]) -> None:
    path.write_bytes(b"".join(line + b"\n" for line in lines))


def test_five_records_verify(log5):
    path, records = log5
    result = verify(path)
    assert result.ok and result.problem == ""
    assert result.count == 5
    assert result.head == records[-1]["hash"]
    assert head_and_count(path) == (records[-1]["hash"], 5)
    assert verify(path, expect_head=records[-1]["hash"].upper(), expect_count=5).ok
    assert read_records(path) == records


def test_record_layout_and_links(log5):
    path, records = log5
    assert [r["index"] for r in records] == [0, 1, 2, 3, 4]
    assert records[0]["prev"] == "0" * 64
    for before, after in zip(records, records[1:]):
        assert after["prev"] == before["hash"]
    assert records[2]["time"] == "2026-03-01T09:32:00.000000Z"
    for line, record in zip(_lines(path), records):
        assert line == canonical_json(record)
        # Cross-check the hash with hashlib and the standard json module: for
        # ASCII keys and these values, sorted compact json.dumps is the
        # canonical form.
        unhashed = {k: v for k, v in record.items() if k != "hash"}
        plain = json.dumps(unhashed, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
        assert record["hash"] == hashlib.sha256(plain.encode()).hexdigest() == record_hash(record)


def test_awkward_values_survive_the_write_and_verify_paths(tmp_path):
    # append_record writes with canonical_json; verify re-derives the bytes
    # from the parsed line by a shorter path. The two must agree.
    path = tmp_path / "log.jsonl"
    body = {"\U0001F602": 1, "\ufb33": 2, "é": [1e-7, 1e16, 2.0, -0.0, 5e-324, 2**70],
            "nested": {"z": [None, True, "\u2028\n\"q\""], "a": {}}, "empty": []}
    record = append_record(path, "plan", body, time=T0)
    assert _lines(path) == [canonical_json(record)]
    assert verify(path).ok
    assert json.loads(_lines(path)[0])["body"]["é"][:2] == [1e-7, 10**16]


def test_empty_and_missing_logs(tmp_path):
    empty = tmp_path / "empty.jsonl"
    empty.write_bytes(b"")
    assert verify(empty) == ledger.VerifyResult(ok=True, count=0, head=GENESIS_HASH)
    assert head_and_count(empty) == ("0" * 64, 0)
    missing = tmp_path / "missing.jsonl"
    assert head_and_count(missing) == ("0" * 64, 0)
    result = verify(missing)
    assert not result.ok and "cannot be read" in result.problem


def _edit_value(path, records):
    lines = _lines(path)
    lines[2] = lines[2].replace(b'"step":2', b'"step":7')
    _put_lines(path, lines)


def _edit_and_rehash(path, records):
    lines = _lines(path)
    forged = {**records[2], "body": {"step": 7, "runs": [2, 2.5]}}
    forged["hash"] = record_hash(forged)
    lines[2] = canonical_json(forged)
    _put_lines(path, lines)


def _delete(path, records):
    lines = _lines(path)
    del lines[2]
    _put_lines(path, lines)


def _swap(path, records):
    lines = _lines(path)
    lines[1], lines[2] = lines[2], lines[1]
    _put_lines(path, lines)


def _forged(prev: str) -> bytes:
    record = {"index": 2, "kind": "plan", "time": "2026-03-01T09:31:30.000000Z", "prev": prev,
              "body": {"step": 99}}
    record["hash"] = record_hash(record)  # its own hash is right
    return canonical_json(record)


def _insert_wrong_prev(path, records):
    lines = _lines(path)
    lines.insert(2, _forged("ab" * 32))
    _put_lines(path, lines)


def _insert_right_prev(path, records):
    lines = _lines(path)
    lines.insert(2, _forged(records[1]["hash"]))
    _put_lines(path, lines)


def _garbage(path, records):
    lines = _lines(path)
    lines[2] = b"this is not JSON"
    _put_lines(path, lines)


def _blank(path, records):
    lines = _lines(path)
    lines.insert(2, b"")
    _put_lines(path, lines)


def _partial_last(path, records):
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 40])


def _missing_final_newline(path, records):
    path.write_bytes(path.read_bytes()[:-1])


def _reformatted(path, records):
    lines = _lines(path)
    lines[3] = json.dumps(records[3]).encode()  # same content, spaces added
    _put_lines(path, lines)


def _crlf(path, records):
    path.write_bytes(path.read_bytes().replace(b"\n", b"\r\n"))


def _duplicate_key(path, records):
    lines = _lines(path)
    lines[1] = lines[1][:-1] + b',"index":1}'
    _put_lines(path, lines)


def _nan_token(path, records):
    lines = _lines(path)
    lines[4] = lines[4].replace(b'"runs":[4,4.5]', b'"runs":[4,NaN]')
    _put_lines(path, lines)


def _lone_surrogate(path, records):
    lines = _lines(path)
    lines[3] = lines[3].replace(b'"body":{', b'"body":{"x":"\\ud800",')
    _put_lines(path, lines)


def _bad_hash_field(path, records):
    lines = _lines(path)
    lines[0] = lines[0].replace(records[0]["hash"].encode(), b"not-a-hash")
    _put_lines(path, lines)


TAMPERING = [
    # (change, first bad position, start of the problem sentence)
    (_edit_value, 2, "record 2 was edited: its hash does not match its content"),
    (_edit_and_rehash, 3, "record 3 does not follow record 2: prev hash differs"),
    (_delete, 2, "record 2 is missing or out of order: expected index 2, found 3"),
    (_swap, 1, "record 1 is missing or out of order: expected index 1, found 2"),
    (_insert_wrong_prev, 2, "record 2 does not follow record 1: prev hash differs"),
    (_insert_right_prev, 3, "record 3 is missing or out of order: expected index 3, found 2"),
    (_garbage, 2, "line 3 (record 2) is not valid JSON"),
    (_blank, 2, "line 3 (record 2) is blank"),
    (_partial_last, 4, "line 5 (record 4) is a partial last line"),
    (_missing_final_newline, 4, "line 5 (record 4) is a partial last line"),
    (_reformatted, 3, "record 3 is not stored in canonical form"),
    (_crlf, 0, "record 0 is not stored in canonical form"),
    (_duplicate_key, 1, "line 2 (record 1) is not valid JSON (the key 'index' appears twice)"),
    (_nan_token, 4, "line 5 (record 4) is not valid JSON (NaN is not a JSON number)"),
    (_lone_surrogate, 3, "record 3 (line 4) is malformed: it holds text that is not valid Unicode"),
    (_bad_hash_field, 0, "record 0 (line 1) is malformed: hash is not 64 lower-case hexadecimal digits"),
]
TAMPER_IDS = [change.__name__.lstrip("_") for change, _, _ in TAMPERING]


@pytest.mark.parametrize(("change", "first_bad", "problem"), TAMPERING, ids=TAMPER_IDS)
def test_tampering_is_found_at_the_right_record(log5, change, first_bad, problem):
    path, records = log5
    change(path, records)
    result = verify(path)
    assert not result.ok
    assert result.first_bad == first_bad
    assert result.line == first_bad + 1
    assert result.problem.startswith(problem), result.problem
    # Everything before the bad record still verified.
    assert result.count == first_bad
    last_good = json.loads(_lines(path)[first_bad - 1]) if first_bad else None
    assert result.head == (last_good["hash"] if first_bad else GENESIS_HASH)
    with pytest.raises(VerificationError, match=re.escape(problem)) as info:
        verify_or_raise(path)
    assert str(path) in str(info.value)
    assert info.value.exit_code == EXIT_VERIFY
    with pytest.raises(VerificationError):
        head_and_count(path)


@pytest.mark.parametrize(("change", "first_bad", "problem"), TAMPERING, ids=TAMPER_IDS)
def test_appending_to_a_tampered_log_is_refused(log5, change, first_bad, problem):
    path, records = log5
    change(path, records)
    before = path.read_bytes()
    with pytest.raises(VerificationError, match=re.escape(f"refusing to append to decision log {path}: {problem}")):
        append_record(path, "plan", {"step": 5})
    assert path.read_bytes() == before
    assert sorted(os.listdir(path.parent)) == ["decisions.jsonl", "decisions.jsonl.lock"]


def test_truncation_needs_the_expected_head_or_count(log5):
    path, records = log5
    _put_lines(path, _lines(path)[:-1])
    # The chain alone cannot show a cut at the end ...
    assert verify(path).ok
    # ... the count and head printed by an earlier report can.
    by_count = verify(path, expect_count=5)
    assert not by_count.ok
    assert by_count.problem == "log has 4 records, expected 5 (truncated?)"
    assert by_count.first_bad == 4
    by_head = verify(path, expect_head=records[-1]["hash"])
    assert not by_head.ok
    assert by_head.problem.startswith("head hash differs from the expected head")
    assert by_head.first_bad is None


def test_records_after_the_expected_head_are_reported(log5):
    path, records = log5
    result = verify(path, expect_head=records[3]["hash"])
    assert not result.ok
    assert result.problem == (
        "head hash differs from the expected head: the expected head is record 3, "
        "and 1 record follows it"
    )
    assert result.first_bad == 4
    more = verify(path, expect_count=3)
    assert more.problem == (
        "log has 5 records, expected 3 (records were added after the expected head?)"
    )


def test_full_rewrite_is_caught_only_by_the_expected_head(log5, tmp_path):
    # Limit of any hash chain: rewriting from record 2 on and recomputing
    # every later hash gives a consistent chain; the kept head shows it.
    path, records = log5
    rewritten = tmp_path / "rewritten.jsonl"
    rewritten.write_bytes(b"".join(canonical_json(record) + b"\n" for record in records[:2]))
    for i in range(2, 5):
        append_record(rewritten, "plan", {"step": -i}, time=T0)
    assert verify(rewritten).ok
    assert not verify(rewritten, expect_head=records[-1]["hash"], expect_count=5).ok


@pytest.mark.parametrize(
    ("expect_head", "expect_count", "message"),
    [("abc", None, "expect_head must be 64 hexadecimal digits"),
     (None, -1, "expect_count must be a whole number >= 0")],
    ids=["short-head", "negative-count"],
)
def test_bad_expectations_are_refused(log5, expect_head, expect_count, message):
    path, _ = log5
    with pytest.raises(ValueError, match=re.escape(message)):
        verify(path, expect_head=expect_head, expect_count=expect_count)


def test_read_records_names_the_bad_line(log5):
    path, records = log5
    _garbage(path, records)
    with pytest.raises(VerificationError, match=re.escape(f"decision log {path}, line 3 is not valid JSON")):
        read_records(path)
    with pytest.raises(VerificationError, match="cannot read decision log"):
        read_records(path.parent / "nope.jsonl")


# --------------------------------------------------------------------------
# Corrections
# --------------------------------------------------------------------------


def test_correction_supersedes_an_earlier_record(log5):
    path, records = log5
    correction = append_record(path, "correction", {"note": "wrong runs file"}, supersedes=1,
                               reason="plan 1 used the runs of another study", time=T0)
    assert correction["index"] == 5
    assert correction["body"] == {"note": "wrong runs file", "supersedes": 1,
                                  "reason": "plan 1 used the runs of another study"}
    second = append_record(path, "correction", {}, supersedes=1, reason="second look", time=T0)
    assert verify(path, expect_count=7).ok
    stored = read_records(path)
    marked = effective_records(stored)
    assert [r["superseded_by"] for r in marked] == [None, second["index"], None, None, None, None, None]
    assert "superseded_by" not in stored[1]  # the caller's records are not changed
    assert marked[1]["hash"] == records[1]["hash"]


@pytest.mark.parametrize(
    ("kind", "kwargs", "message"),
    [
        ("correction", {"reason": "x"}, "a correction must name the record it supersedes"),
        ("correction", {"supersedes": 1}, "superseding record 1 needs a reason"),
        ("correction", {"supersedes": 1, "reason": "   "}, "superseding record 1 needs a reason"),
        ("plan", {"supersedes": 1}, "superseding record 1 needs a reason"),
        ("correction", {"supersedes": 5, "reason": "x"},
         "supersedes=5 does not name an earlier record: the log has 5 records (0 to 4)"),
        ("correction", {"supersedes": -1, "reason": "x"}, "supersedes must be a record index"),
        ("correction", {"supersedes": True, "reason": "x"}, "supersedes must be a record index"),
        ("Plan", {}, "kind must be a lower-case word"),
        ("", {}, "kind must be a lower-case word"),
    ],
    ids=["no-target", "no-reason", "blank-reason", "plan-no-reason", "future-target",
         "negative", "bool", "capitals", "empty-kind"],
)
def test_bad_corrections_are_refused_and_change_nothing(log5, kind, kwargs, message):
    path, _ = log5
    before = path.read_bytes()
    with pytest.raises(ValueError, match=re.escape(message)):
        append_record(path, kind, {}, **kwargs)
    assert path.read_bytes() == before


def test_body_and_argument_must_agree(log5):
    path, _ = log5
    with pytest.raises(ValueError, match="disagrees with body"):
        append_record(path, "correction", {"supersedes": 2}, supersedes=3, reason="x")


def test_forged_correction_pointing_forward_is_found(log5):
    path, records = log5
    lines = _lines(path)
    forged = {"index": 5, "kind": "correction", "time": records[4]["time"], "prev": records[4]["hash"],
              "body": {"supersedes": 9, "reason": "x"}}
    forged["hash"] = record_hash(forged)
    _put_lines(path, lines + [canonical_json(forged)])
    result = verify(path)
    assert result.first_bad == 5
    assert result.problem == "record 5 supersedes record 9, which does not come before it"


# --------------------------------------------------------------------------
# Writing: values, time, atomicity, locking
# --------------------------------------------------------------------------


def test_nan_in_a_body_is_refused_before_anything_is_written(tmp_path):
    path = tmp_path / "log.jsonl"
    with pytest.raises(ValueError, match=re.escape("body.fit.sd[0] is nan")):
        append_record(path, "plan", {"fit": {"sd": np.array([np.nan])}})
    assert not path.exists()


def test_append_does_not_change_the_callers_body(tmp_path):
    body = {"x": np.array([1.0, 2.0]), "note": "n"}
    append_record(tmp_path / "log.jsonl", "plan", body, supersedes=None)
    assert set(body) == {"x", "note"} and isinstance(body["x"], np.ndarray)


@pytest.mark.parametrize(
    ("given", "stored"),
    [("2026-03-01T11:30:00+02:00", "2026-03-01T09:30:00.000000Z"),
     ("2026-03-01T09:30:00.5Z", "2026-03-01T09:30:00.500000Z"),
     (datetime(2026, 3, 1, 4, 30, tzinfo=timezone(timedelta(hours=-5))), "2026-03-01T09:30:00.000000Z")],
    ids=["offset-text", "z-text", "aware-datetime"],
)
def test_times_are_stored_in_utc(tmp_path, given, stored):
    record = append_record(tmp_path / "log.jsonl", "plan", {}, time=given)
    assert record["time"] == stored


@pytest.mark.parametrize("bad", [datetime(2026, 3, 1, 9, 30), "2026-03-01T09:30:00", "yesterday"],
                         ids=["naive-datetime", "naive-text", "not-a-time"])
def test_times_without_a_zone_are_refused(tmp_path, bad):
    with pytest.raises(ValueError, match="time zone"):
        append_record(tmp_path / "log.jsonl", "plan", {}, time=bad)


def test_default_time_is_now_in_utc(tmp_path):
    before = datetime.now(timezone.utc)
    record = append_record(tmp_path / "log.jsonl", "plan", {})
    after = datetime.now(timezone.utc)
    stamp = datetime.fromisoformat(record["time"])
    assert record["time"].endswith("Z")
    assert before - timedelta(seconds=1) <= stamp <= after + timedelta(seconds=1)


@pytest.mark.parametrize("broken", ["replace", "fsync"], ids=["os.replace", "os.fsync"])
def test_failed_append_leaves_the_log_whole(log5, monkeypatch, broken):
    path, _ = log5
    before = path.read_bytes()

    def fail(*args):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(fileio.os, broken, fail)
    with pytest.raises(OutputError, match=re.escape(f"could not write {path}: Input/output error")):
        append_record(path, "plan", {"step": 5})
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert verify(path, expect_count=5).ok
    assert sorted(os.listdir(path.parent)) == ["decisions.jsonl", "decisions.jsonl.lock"]


def test_lock_timeout_is_an_output_error(log5):
    path, _ = log5
    before = path.read_bytes()
    with filelock.FileLock(str(path) + ".lock"):
        with pytest.raises(OutputError, match=re.escape(f"could not lock {path}.lock within 0.05 s")):
            append_record(path, "plan", {}, lock_timeout=0.05)
    assert path.read_bytes() == before


def _append_many(path: str, worker: int, n: int) -> None:
    for i in range(n):
        append_record(path, "plan", {"worker": worker, "i": i})


def test_concurrent_appends_from_several_processes_make_one_chain(tmp_path):
    path = str(tmp_path / "shared.jsonl")
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    context = multiprocessing.get_context(method)
    workers = [context.Process(target=_append_many, args=(path, w, 10)) for w in range(4)]
    for process in workers:
        process.start()
    for process in workers:
        process.join(timeout=120)
    assert [process.exitcode for process in workers] == [0, 0, 0, 0]
    result = verify(path, expect_count=40)
    assert result.ok, result.problem
    bodies = sorted((r["body"]["worker"], r["body"]["i"]) for r in read_records(path))
    assert bodies == [(w, i) for w in range(4) for i in range(10)]
