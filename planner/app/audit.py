"""Who did what, and whether a campaign can be trusted: operators, corrections, verification.

- :func:`resolve_operator`: the name recorded on every record this tool
  appends, from ``--by``, else the environment variable
  ``GUARDBAND_OPERATOR``, else the login name; the record says which.
- :func:`verify_campaign`: the log's hash chain, then every file its
  records name (by SHA-256), and the files no record names; an empty log
  fails unless the caller accepts it.
- :func:`supersede_record`: append a correction record that names the
  record it supersedes, why, and by whom.
"""

from __future__ import annotations

import getpass
import os
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path

from guardband.planner.errors import OperatorError, VerificationError
from guardband.planner.app.campaign import FolderCheck, check_folder
from guardband.safety import ledger

__all__ = ["OPERATOR_ENV", "MAX_OPERATOR_LENGTH", "resolve_operator", "CampaignVerdict",
           "verify_campaign", "supersede_record"]

#: Environment variable naming the operator when ``--by`` is not given.
OPERATOR_ENV = "GUARDBAND_OPERATOR"
#: Longest operator name or correction reason accepted, in characters.
MAX_OPERATOR_LENGTH = 200
MAX_REASON_LENGTH = 2000


def _clean_text(value: str, what: str, limit: int) -> str:
    text = unicodedata.normalize("NFC", value).strip()
    if not text:
        raise OperatorError(f"{what} is empty; give a name or a sentence")
    if len(text) > limit:
        raise OperatorError(f"{what} is {len(text)} characters long; at most {limit} are accepted")
    bad = [ch for ch in text if unicodedata.category(ch) in ("Cc", "Cf") and ch not in "\t"]
    if bad:
        raise OperatorError(f"{what} holds a control or invisible character "
                            f"(U+{ord(bad[0]):04X}); write it as plain text")
    return text


def resolve_operator(by: str | None = None) -> dict:
    """The operator recorded on a record, and where the name came from.

    Returns
    -------
    dict
        ``{"name": ..., "source": "--by" | "environment GUARDBAND_OPERATOR" | "login name"}``.

    Raises
    ------
    OperatorError
        The name given is empty, too long or holds control characters, or
        no name can be found at all.
    """
    if by is not None:
        return {"name": _clean_text(by, "--by (the operator's name)", MAX_OPERATOR_LENGTH), "source": "--by"}
    env = os.environ.get(OPERATOR_ENV)
    if env is not None and env.strip():
        return {"name": _clean_text(env, f"the environment variable {OPERATOR_ENV}", MAX_OPERATOR_LENGTH),
                "source": f"environment {OPERATOR_ENV}"}
    try:
        login = getpass.getuser()
    except (OSError, KeyError, ImportError):
        login = ""
    if not login or not login.strip():
        raise OperatorError(f"no operator name: give --by NAME or set {OPERATOR_ENV}")
    return {"name": _clean_text(login, "the login name", MAX_OPERATOR_LENGTH), "source": "login name"}


@dataclass(frozen=True)
class CampaignVerdict:
    """The log's own verification and the check of the files its records name."""

    log: ledger.VerifyResult
    files: FolderCheck | None = None
    problem: str = ""
    notes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def ok(self) -> bool:
        return not self.problem

    def to_dict(self) -> dict:
        out = self.log.to_dict()
        out.update({"ok": self.ok, "problem": self.problem,
                    "files": self.files.to_dict() if self.files else None, "notes": list(self.notes)})
        return out


def verify_campaign(
    log: str | Path,
    *,
    expect_head: str | None = None,
    expect_count: int | None = None,
    accept_empty: bool = False,
    check_files: bool = True,
) -> CampaignVerdict:
    """Verify a decision log and the files of its campaign folder.

    Raises
    ------
    ValueError
        ``expect_head`` or ``expect_count`` is malformed.
    """
    log = Path(log)
    result = ledger.verify(log, expect_head=expect_head, expect_count=expect_count)
    if not result.ok:
        return CampaignVerdict(result, problem=result.problem)
    if result.count == 0 and not accept_empty:
        return CampaignVerdict(result, problem=(
            f"the decision log {log.name} holds no record (an empty log proves nothing; "
            "pass --accept-empty if an empty log is expected)"))
    if not check_files:
        return CampaignVerdict(result)
    try:
        found = check_folder(log.parent, ledger.read_records(log), log_name=log.name)
    except VerificationError as exc:
        return CampaignVerdict(result, problem=str(exc))
    problem = ""
    if found.problems:
        problem = "campaign files: " + "; ".join(found.problems)
    return CampaignVerdict(result, files=found, problem=problem, notes=tuple(found.notes))


def supersede_record(log: str | Path, index: int, reason: str, *, by: str | None = None) -> dict:
    """Append a correction record: record ``index`` is superseded, for ``reason``, by the operator.

    The log must verify (chain and files) and hold record ``index``; the
    record superseded is not changed. Nothing is written on any refusal.

    Raises
    ------
    VerificationError
        The log fails verification or has no record ``index``.
    OperatorError
        The reason or the operator's name is empty, too long or holds
        control characters.
    """
    log = Path(log)
    text = _clean_text(reason, "--reason", MAX_REASON_LENGTH)
    operator = resolve_operator(by)
    verdict = verify_campaign(log, accept_empty=True)
    if not verdict.ok:
        raise VerificationError(f"decision log {log} failed verification: {verdict.problem}; "
                                "nothing was appended")
    if not 0 <= index < verdict.log.count:
        last = f" (0 to {verdict.log.count - 1})" if verdict.log.count else ""
        raise VerificationError(f"{log.name}: there is no record {index} to supersede: the log has "
                                f"{verdict.log.count} record(s){last}; nothing was appended")
    target = ledger.read_records(log)[index]
    body = {"operator": operator, "supersedes_kind": target["kind"],
            "supersedes_hash": target["hash"]}
    label = (target.get("body") or {}).get("step_label")
    if label:
        body["supersedes_label"] = label
    return ledger.append_record(log, ledger.CORRECTION, body, supersedes=index, reason=text)
