"""The README's worked campaign, run as written.

The blocks that follow a ``<!-- worked-campaign ... -->`` line in the
section "A worked campaign" are run in a temporary folder that sees the
repository's ``protocols/`` and ``scripts/``: each ``guardband ...`` line
through the command line itself (in this process, so that the imports are
paid once), ``python scripts/<name>.py ...`` through that script's
``main``, ``mkdir -p`` as the shell would, and a ``python`` block as a
program. Any other line fails the test, so the README cannot show a command
that is not run here. Then every ``scratch/`` file the section names must
exist (``<hash>`` and ``<label>`` stand for any text), and the blocks must
use every command of the command line.
"""

from __future__ import annotations

import importlib.util
import os
import re
import runpy
import shlex
import time

import pytest
import typer.main
from typer.testing import CliRunner

from guardband.planner.cli import app

from conftest import ROOT

MARKER = "<!-- worked-campaign"
SECTION = "## A worked campaign"


def section_text() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    start = text.index(SECTION)
    end = text.find("\n## ", start + len(SECTION))
    return text[start:end if end >= 0 else len(text)]


def marked_blocks(text: str) -> list[tuple[str, str]]:
    """(language, body) of every fenced block that follows a marker line."""
    lines = text.splitlines()
    blocks = []
    for k, line in enumerate(lines):
        if not line.startswith(MARKER):
            continue
        fence = lines[k + 1]
        assert fence.startswith("```"), f"a marker must sit right above a fenced block (line {k + 2})"
        end = next(j for j in range(k + 2, len(lines)) if lines[j].startswith("```"))
        blocks.append((fence[3:].strip(), "\n".join(lines[k + 2:end])))
    return blocks


def shell_commands(body: str) -> list[list[str]]:
    """The commands of a shell block: continuation lines joined, comments dropped, words split."""
    joined = re.sub(r"\\\n", " ", body)
    return [words for line in joined.splitlines() if (words := shlex.split(line, comments=True))]


def run_script(path, args) -> int:
    spec = importlib.util.spec_from_file_location("readme_script", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.main(args)


def run_command(words: list[str]) -> tuple[int, str]:
    """Run one line of a shell block; return its exit code and its output."""
    if words[0] == "guardband":
        res = CliRunner().invoke(app, words[1:])
        if res.exception is not None and not isinstance(res.exception, SystemExit):
            raise res.exception
        return res.exit_code, res.stdout + res.stderr
    if words[0] == "python" and len(words) > 1 and words[1].startswith("scripts/"):
        return run_script(words[1], words[2:]), ""
    if words[:2] == ["mkdir", "-p"]:
        for folder in words[2:]:
            os.makedirs(folder, exist_ok=True)
        return 0, ""
    raise AssertionError(f"the worked campaign uses a command this test does not run: {shlex.join(words)}")


def named_paths(text: str) -> list[str]:
    """Every ``scratch/...`` path the section names, as glob patterns."""
    found = re.findall(r"scratch/[A-Za-z0-9_./<>-]*", text)
    return sorted({re.sub(r"<[a-z]+>", "*", p.rstrip(".")) for p in found})


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    """Run every marked block once, in order; keep each command's exit code and the time taken."""
    folder = tmp_path_factory.mktemp("worked")
    for name in ("protocols", "scripts"):
        os.symlink(ROOT / name, folder / name)
    outcomes = []
    before = os.getcwd()
    os.chdir(folder)
    began = time.perf_counter()
    try:
        for language, body in marked_blocks(section_text()):
            if language == "python":
                script = folder / "readme_block.py"
                script.write_text(body, encoding="utf-8")
                runpy.run_path(str(script), run_name="__main__")
                outcomes.append(("python block", 0, ""))
                continue
            assert language == "sh", f"unexpected block language {language!r}"
            for words in shell_commands(body):
                t0 = time.perf_counter()
                code, output = run_command(words)
                print(f"{time.perf_counter() - t0:6.1f} s  {shlex.join(words)[:90]}")
                outcomes.append((shlex.join(words), code, output))
                if code != 0:
                    break
    finally:
        os.chdir(before)
    return folder, outcomes, time.perf_counter() - began


@pytest.mark.slow
def test_every_command_of_the_worked_campaign_exits_with_0(campaign):
    _, outcomes, seconds = campaign
    failed = [(line, code, output[-2000:]) for line, code, output in outcomes if code != 0]
    assert not failed, failed
    assert len(outcomes) >= 20
    print(f"worked campaign: {len(outcomes)} commands in {seconds:.1f} s")


@pytest.mark.slow
def test_every_file_the_section_names_exists(campaign):
    folder, _, _ = campaign
    patterns = named_paths(section_text())
    assert "scratch/campaign/plan-*.csv" in patterns and "scratch/runs-3.csv" in patterns
    missing = [p for p in patterns if not list(folder.glob(p.rstrip("/")))]
    assert not missing, missing


@pytest.mark.slow
def test_the_campaign_holds_three_plans_a_judgement_and_a_correction(campaign):
    from guardband.safety import ledger

    folder, outcomes, _ = campaign
    kinds = [r["kind"] for r in ledger.read_records(folder / "scratch/campaign/decisions.jsonl")]
    assert kinds == ["plan", "plan", "plan", "judge", "correction"]
    assert len(list((folder / "scratch/campaign").glob("report-*.html"))) == 1  # the third step's
    replay = next(out for line, _, out in outcomes if line.startswith("guardband replay"))
    assert "identical: record 2" in replay


def test_the_worked_campaign_uses_every_command():
    commands = set(typer.main.get_command(app).commands)
    used = {words[1] for language, body in marked_blocks(section_text()) if language == "sh"
            for words in shell_commands(body) if words[0] == "guardband" and len(words) > 1}
    assert commands - used == set()
    assert "--help" in used


def test_the_block_parser_joins_continued_lines_and_keeps_quoted_words():
    body = 'guardband plan a.toml b.csv --out c \\\n    --by "A. Chemist"  # a comment\n\nmkdir -p x'
    assert shell_commands(body) == [["guardband", "plan", "a.toml", "b.csv", "--out", "c", "--by", "A. Chemist"],
                                    ["mkdir", "-p", "x"]]
    assert named_paths("see scratch/campaign/plan-<hash>.csv and scratch/runs-1.csv.") == [
        "scratch/campaign/plan-*.csv", "scratch/runs-1.csv"]
