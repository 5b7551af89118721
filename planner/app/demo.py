"""``guardband demo``: check, plan, verify and replay on the bundled tablet blend.

Everything goes into one folder: copies of the demo protocol and runs, the
plan and exclusion tables, the decision log and a short summary text.
The demo data is invented (see ``protocols/make_demo_runs.py``; shipped as package data).
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path
from typing import Callable

from guardband.planner.errors import GuardbandError, OutputError
from guardband.planner.app.fileio import atomic_write_bytes, atomic_write_text
from guardband.planner.app.textable import render_table

__all__ = ["DEMO_PROTOCOL", "DEMO_RUNS", "examples_dir", "run_demo"]

DEMO_PROTOCOL = "tablet_blend.toml"
DEMO_RUNS = "tablet_blend_runs.csv"


def examples_dir() -> Path:
    """The folder that holds the example protocols (package data ``guardband.protocols``)."""
    candidate = Path(str(resources.files("guardband.protocols")))
    if (candidate / DEMO_PROTOCOL).exists():
        return candidate
    raise OutputError(
        f"the example protocols were not found in {candidate}; reinstall Guardband "
        "(the wheel ships them as package data)"
    )


def run_demo(out: str | Path, *, echo: Callable[[str], None] = lambda s: None) -> list[str]:
    """Run the demo into ``out``; return the summary lines (also written to SUMMARY.txt)."""

    from guardband.planner.app.plan_text import figures_table, settings_table
    from guardband.planner.app.workflow import LOG_NAME, cautions_of, check_protocol, replay_record, run_plan

    from guardband.planner.app.audit import verify_campaign

    out = Path(out)
    src = examples_dir()
    if out.is_symlink() or (out.exists() and not out.is_dir()):
        raise OutputError(f"{out} exists and is not a folder; --out names the folder the demo writes into")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the demo folder {out}: {exc.strerror or exc}") from None
    protocol_path = out / DEMO_PROTOCOL
    runs_path = out / DEMO_RUNS
    atomic_write_bytes(protocol_path, (src / DEMO_PROTOCOL).read_bytes())
    atomic_write_bytes(runs_path, (src / DEMO_RUNS).read_bytes())
    summary: list[str] = []

    def say(line: str = "") -> None:
        echo(line)
        summary.append(line)

    say("== 1. check the protocol")
    report = check_protocol(protocol_path)
    p = report.protocol
    say(f"{p.study.title}: {'EMPTY design space' if report.empty else 'design space not empty'}; "
        f"fingerprint {p.fingerprint}")
    rows = report.rows()
    say(render_table(list(rows[0].keys()), [list(r.values()) for r in rows]))
    if report.empty:
        raise GuardbandError("the demo protocol's design space is empty")

    say("")
    say("== 2. plan the next batch")
    outcome = run_plan(protocol_path, runs_path, out)
    result = outcome.result
    label = outcome.record["body"]["step_label"]
    inc = result.incumbent
    say(f"mode {result.mode}; incumbent "
        + (f"{inc['value']:.4g} (run {inc['run_id']})" if inc else "none"))
    say("candidates: " + ", ".join(f"{k} {v}" for k, v in result.counts().items() if v))
    for m in result.messages:
        say(f"note: {m}")
    say(settings_table(result, label))
    say(figures_table(result, label))
    say(f"plan table: {outcome.files['plan'].name}; exclusion table: {outcome.files['exclusions'].name}")

    say("")
    say("== 3. verify the decision log")
    verdict = verify_campaign(out / LOG_NAME, expect_head=outcome.head, expect_count=outcome.count)
    v = verdict.log
    files = f"; {verdict.files.checked} named files match their SHA-256" if verdict.files else ""
    say(f"{'ok' if verdict.ok else 'FAILED'}: {v.count} record(s), head {v.head}{files}"
        + ("" if verdict.ok else f": {verdict.problem}"))

    say("")
    say("== 4. replay the planning step")
    r = replay_record(out / LOG_NAME, outcome.record["index"])
    say(("identical" if r.identical else "DIFFERENT: " + "; ".join(r.differences))
        + f" (plan sha256 {r.replayed_sha256[:16]}...)")

    say("")
    say("CAUTIONS:")
    for c in cautions_of(p):
        say(f"  - {c}")
    atomic_write_text(out / "SUMMARY.txt", "\n".join(summary) + "\n")
    return [f"demo folder: {out}"]
