"""The calibration a campaign has earned: planned runs that broke a limit against the promise."""

from __future__ import annotations

import csv
import io
import itertools
import json

import numpy as np
import pytest
from scipy import stats
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.safety import ledger
from guardband.safety.calibration import earned_calibration, poisson_binomial_tail

from conftest import PROTOCOLS


@pytest.mark.parametrize("n,p", [(1, 0.05), (10, 0.05), (30, 0.1), (60, 0.2)])
def test_tail_with_equal_rates_is_the_binomial_tail(n, p):
    # reference: scipy.stats.binom (equal rates make the Poisson-binomial a binomial)
    for k in range(n + 1):
        assert poisson_binomial_tail(np.full(n, p), k) == pytest.approx(stats.binom.sf(k - 1, n, p), abs=1e-12)


def test_tail_with_unequal_rates_matches_enumeration():
    rates = np.array([0.05, 0.3, 0.01, 0.5, 0.2])
    outcomes = np.array(list(itertools.product([0, 1], repeat=rates.size)))
    prob = np.prod(np.where(outcomes == 1, rates, 1 - rates), axis=1)
    for k in range(rates.size + 1):
        assert poisson_binomial_tail(rates, k) == pytest.approx(prob[outcomes.sum(axis=1) >= k].sum(), abs=1e-12)


def test_history_that_contradicts_the_promise_is_flagged_and_one_that_keeps_it_is_not():
    promised = np.full(20, 0.95)
    bad = earned_calibration(promised, np.arange(20) < 5, [f"R{i}" for i in range(20)])
    assert bad.contradicts and bad.n_broke == 5 and bad.expected_broke == pytest.approx(1.0)
    assert bad.broke_run_ids == ("R0", "R1", "R2", "R3", "R4")
    assert "WARNING" in bad.sentence()
    good = earned_calibration(promised, np.arange(20) < 1)
    assert not good.contradicts and "WARNING" not in good.sentence()
    assert "no planned run" in earned_calibration([], []).sentence()


def _append_measured(runs_text: str, plan_csv: str, values: dict) -> str:
    """The runs file plus the plan's proposals, measured with the given values."""
    reader = csv.DictReader(line for line in io.StringIO(plan_csv) if not line.startswith("#"))
    header = next(csv.reader(io.StringIO(runs_text.splitlines()[0])))
    out = io.StringIO()
    out.write(runs_text if runs_text.endswith("\n") else runs_text + "\n")
    writer = csv.writer(out, lineterminator="\n")
    for row in reader:
        writer.writerow([row.get(h, "") if h not in values else values[h] for h in header])
    return out.getvalue()


def test_plan_output_reports_planned_runs_that_broke_a_limit(tmp_path):
    protocol = PROTOCOLS / "tablet_blend.toml"
    runs_text = (PROTOCOLS / "tablet_blend_runs.csv").read_text()
    out = tmp_path / "campaign"
    runner = CliRunner()
    res = runner.invoke(app, ["plan", str(protocol), str(PROTOCOLS / "tablet_blend_runs.csv"), "--out", str(out),
                              "--pool", "300"])
    assert res.exit_code == 0, res.output
    assert "no planned run of this campaign has been measured yet" in res.stdout
    plan_csv = next(out.glob("plan-*.csv")).read_text()
    # every planned run came back over the friability limit (1.0)
    measured = _append_measured(runs_text, plan_csv, {"dissolution_30min": "80", "degradant_b": "0.1",
                                                      "friability": "1.6"})
    runs2 = tmp_path / "runs2.csv"
    runs2.write_text(measured)
    res = runner.invoke(app, ["plan", str(protocol), str(runs2), "--out", str(out), "--pool", "300"])
    # after four breaks the screen may find nothing it can vouch for (exit 6): the
    # step is still recorded, with the history that contradicts the promise
    assert res.exit_code in (0, 6), res.output
    assert "4 of 4 measured planned runs broke a limit" in res.stdout
    assert "WARNING" in res.stdout and "warning: calibration so far" in res.stderr
    body = ledger.read_records(out / "decisions.jsonl")[1]["body"]
    assert body["calibration_earned"]["n_broke"] == 4 and body["calibration_earned"]["contradicts_promise"]
    assert json.dumps(body["calibration_earned"])  # JSON-able as recorded
    # the report of that step says the same, at the top where a reviewer looks first
    res = runner.invoke(app, ["report", str(out)])
    assert res.exit_code == 0, res.output
    label = body["step_label"]
    html = (out / f"report-{label}.html").read_text(encoding="utf-8")
    assert 'id="earned"' in html and "4 of 4 measured planned runs broke a limit" in html
    top = html[html.index('id="problems"'):html.index('id="fingerprints')]
    assert "WARNING" in top and "too optimistic" in top
    first = (out / f"report-{ledger.read_records(out / 'decisions.jsonl')[0]['body']['step_label']}.html")
    assert "no planned run of this campaign has been measured yet" in first.read_text(encoding="utf-8")


def test_a_planned_run_made_with_other_settings_is_not_counted_against_its_promise(tmp_path):
    """The promise was made for the proposed recipe: a run that keeps the plan's run id but was
    made elsewhere (force 19 kN for a proposal at about 12) is named and left out, while one
    weighed to a few digits (a rounding of the proposal) still counts."""
    protocol = PROTOCOLS / "tablet_blend.toml"
    runs_text = (PROTOCOLS / "tablet_blend_runs.csv").read_text()
    out = tmp_path / "campaign"
    runner = CliRunner()
    res = runner.invoke(app, ["plan", str(protocol), str(PROTOCOLS / "tablet_blend_runs.csv"), "--out", str(out),
                              "--pool", "300", "--count", "2"])
    assert res.exit_code == 0, res.output
    plan_csv = next(out.glob("plan-*.csv")).read_text()
    measured = _append_measured(runs_text, plan_csv, {"dissolution_30min": "80", "degradant_b": "0.1",
                                                      "friability": "1.6"})
    lines = measured.rstrip("\n").split("\n")
    header = lines[0].split(",")
    first, second = lines[-2].split(","), lines[-1].split(",")
    force = header.index("force")
    assert abs(float(first[force]) - 19.0) > 1.0
    first[force] = "19"  # made at another force than proposed
    for k, name in enumerate(header):  # the other run weighed to four decimals, as a lab would
        if name in ("mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force"):
            second[k] = f"{float(second[k]):.4f}"
    mcc = header.index("mcc")  # keep the mixture total after rounding
    comps = [header.index(n) for n in ("active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate")]
    second[mcc] = f"{float(second[mcc]) + 1.0 - sum(float(second[k]) for k in comps):.5f}"
    (tmp_path / "runs2.csv").write_text("\n".join([*lines[:-2], ",".join(first), ",".join(second)]) + "\n")
    res = runner.invoke(app, ["plan", str(protocol), str(tmp_path / "runs2.csv"), "--out", str(out),
                              "--pool", "300"])
    assert res.exit_code in (0, 6), res.output
    flat = " ".join(res.stdout.split())
    assert "1 of 1 measured planned runs broke a limit" in flat
    assert f"not counted: {first[0]} (made with other settings than proposed: force" in flat
    earned = ledger.read_records(out / "decisions.jsonl")[1]["body"]["calibration_earned"]
    assert earned["n_measured"] == 1 and earned["not_as_proposed_run_ids"] == [first[0]]
