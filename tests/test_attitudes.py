"""The ranking rules as attitudes to risk: each rule's pick, its figures, and the price of a threshold.

References: the outcome figures against ``scipy.stats.norm`` (reference
library); expected improvement against numerical quadrature of
E[max(Y - y*, 0)] (``scipy.integrate.quad``); Jensen's inequality
(E[max(Y - y*, 0)] >= max(E[Y] - y*, 0), since max(., 0) is convex) as a
property; the joint-figure bounds (Boole/Bonferroni: the bound
1 - sum(1 - p_i) is at most each p_i) for the threshold warnings.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import integrate, stats
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.inputs.runs import read_runs
from guardband.planner.step import plan_step
from guardband.planner.step.acquisition import score as rule_score
from guardband.planner.step.attitudes import RULE_ORDER, outcome_figures, threshold_binding

from conftest import PROTOCOLS, with_sections

POOL = 500



@pytest.fixture(scope="module")
def tablet():
    p = load_protocol(PROTOCOLS / "tablet_blend.toml")
    return p, read_runs(PROTOCOLS / "tablet_blend_runs.csv", p)


@pytest.fixture(scope="module")
def tablet_plan(tablet):
    p, runs = tablet
    return plan_step(with_sections(p, screen={"threshold": 0.93}), runs, seed=4, pool_size=POOL)


@pytest.mark.parametrize("maximize", [True, False])
def test_outcome_figures_agree_with_scipy_norm(maximize):
    mean, sd, inc = np.array([1.0, 2.5, -0.3]), np.array([0.5, 2.0, 0.01]), 1.2
    f = outcome_figures(mean, sd, inc, maximize=maximize)
    better = stats.norm.sf(inc, mean, sd) if maximize else stats.norm.cdf(inc, mean, sd)
    np.testing.assert_allclose(f["p_better"], better, rtol=1e-12)
    np.testing.assert_allclose(f["p_worse"], 1.0 - better, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(f["q05"], stats.norm.ppf(0.05, mean, sd), rtol=1e-12)
    np.testing.assert_allclose(f["q95"], stats.norm.ppf(0.95, mean, sd), rtol=1e-12)
    np.testing.assert_allclose(f["lo95"], stats.norm.ppf(0.025, mean, sd), rtol=1e-9)
    np.testing.assert_allclose(f["hi95"], stats.norm.ppf(0.975, mean, sd), rtol=1e-9)


@pytest.mark.parametrize("maximize", [True, False])
def test_expected_gain_and_shortfall_agree_with_quadrature(maximize):
    mean, sd, inc = np.array([0.4, 1.0, 3.0]), np.array([0.7, 0.2, 1.5]), 1.1
    f = outcome_figures(mean, sd, inc, maximize=maximize)
    for m, s, ei, short in zip(mean, sd, f["ei"], f["shortfall"]):
        gain = (lambda y: (y - inc)) if maximize else (lambda y: (inc - y))
        pdf = stats.norm(m, s).pdf
        lo, hi = m - 12 * s, m + 12 * s
        q_gain = integrate.quad(lambda y: max(gain(y), 0.0) * pdf(y), lo, hi, points=[inc], limit=200)[0]
        q_loss = integrate.quad(lambda y: max(-gain(y), 0.0) * pdf(y), lo, hi, points=[inc], limit=200)[0]
        assert ei == pytest.approx(q_gain, rel=1e-7, abs=1e-12)
        assert short == pytest.approx(q_loss, rel=1e-7, abs=1e-12)
        # gain - loss is the improvement of the mean (a check on both at once)
        assert ei - short == pytest.approx(gain(m), abs=1e-9)


@settings(max_examples=200, deadline=None)
@given(mean=st.floats(-1e3, 1e3), sd=st.floats(1e-6, 1e3), inc=st.floats(-1e3, 1e3), maximize=st.booleans())
def test_expected_gain_is_never_below_the_gain_of_the_mean(mean, sd, inc, maximize):
    f = outcome_figures(np.array([mean]), np.array([sd]), inc, maximize=maximize)
    gain_of_mean = (mean - inc) if maximize else (inc - mean)
    assert f["ei"][0] >= 0.0
    assert f["ei"][0] >= max(gain_of_mean, 0.0) - 1e-9 * max(1.0, abs(gain_of_mean))


def test_each_rules_pick_is_the_best_survivor_by_that_rule(tablet_plan):
    res = tablet_plan
    assert [e["rule"] for e in res.rule_picks] == list(RULE_ORDER)
    surv = np.flatnonzero(res.screen.survives)
    U = res.unit(res.pool[surv])
    mu, sd = res.fitted[res.protocol.objective.name].predict(U)
    kw = dict(maximize=res.protocol.maximize, kappa=res.protocol.ranking.kappa, xi=res.protocol.ranking.xi)
    for e in res.rule_picks:
        assert res.screen.survives[e["candidate"]]
        s = rule_score(e["rule"], mu, sd, res.incumbent["value"], **kw)
        assert s[surv.tolist().index(e["candidate"])] == pytest.approx(s.max(), rel=1e-9, abs=1e-12)
        assert e["joint"] == pytest.approx(float(res.screen.joint[e["candidate"]]))
    # the protocol's own rule picks what the plan proposes first
    own = next(e for e in res.rule_picks if e["rule"] == res.protocol.ranking.rule)
    np.testing.assert_allclose([own["x"][n] for n in res.factor_names], res.proposals[0].x)


def test_the_price_of_a_threshold_never_falls_and_each_point_passes_there(tablet_plan):
    res = tablet_plan
    price = res.threshold_price
    assert [e["threshold"] for e in price] == sorted({0.5, 0.8, 0.9, 0.93, 0.95, 0.99})
    assert sum(e["own"] for e in price) == 1
    sign = 1.0 if res.protocol.maximize else -1.0
    best = [sign * e["best_mean"] for e in price if e["best_mean"] is not None]
    assert all(a >= b - 1e-12 for a, b in zip(best, best[1:])), best
    assert all(a["n_pass"] >= b["n_pass"] for a, b in zip(price, price[1:]))
    limits = res.protocol.limits
    for e in price:
        if e["x"] is None:
            continue
        x = np.array([[e["x"][n] for n in res.factor_names]])
        P, J = res.limit_figures(x)
        assert J[0] >= e["threshold"] - 1e-9
        assert all(P[0, j] >= lim.probability - 1e-9 for j, lim in enumerate(limits))
        assert bool(res.space.contains(x)[0])
        mu = res.fitted[res.protocol.objective.name].predict(res.unit(x))[0][0]
        assert mu == pytest.approx(e["best_mean"], rel=1e-9)


def test_a_rule_that_needs_an_incumbent_says_why_it_has_no_pick(tablet):
    p, runs = tablet
    # a degradant limit below every run: no run meets every limit, so feasibility first
    data = with_sections(p, screen={"max_step": None}).model_dump(mode="python")
    data["limits"][0]["upper"] = 0.05
    res = plan_step(parse_protocol(data), runs, seed=2, pool_size=POOL)
    assert res.mode == "feasibility-first"
    by_rule = {e["rule"]: e for e in res.rule_picks}
    for rule in ("ei", "pi"):
        assert by_rule[rule]["candidate"] is None and "none yet" in by_rule[rule]["note"]


def test_threshold_warnings_follow_the_joint_figure_bounds(tablet):
    p, _ = tablet  # two limits at 0.95 each
    loose = threshold_binding(with_sections(p, screen={"threshold": 0.9}))
    assert len(loose) == 1 and "never binds" in loose[0] and "at least 0.9 " in loose[0]
    assert threshold_binding(with_sections(p, screen={"threshold": 0.92})) == []
    tight = threshold_binding(with_sections(p, screen={"threshold": 0.97}))
    assert len(tight) == 1 and "degradant_b (0.95)" in tight[0] and "friability (0.95)" in tight[0]
    # independence: the joint figure is at least 0.95 * 0.95 = 0.9025
    product = threshold_binding(with_sections(p, screen={"threshold": 0.9, "joint": "independent"}))
    assert len(product) == 1 and "at least 0.9025" in product[0]
    assert threshold_binding(with_sections(p, screen={"threshold": 0.91, "joint": "independent"})) == []


def test_plan_output_check_and_log_show_the_comparison_and_the_price(tmp_path):
    runner = CliRunner()
    res = runner.invoke(app, ["plan", str(PROTOCOLS / "dose_combination.toml"),
                              str(PROTOCOLS / "dose_combination_runs.csv"), "--out", str(tmp_path / "c")])
    assert res.exit_code == 0, res.output
    assert "what each ranking rule would propose first" in res.stdout
    assert "the price of the threshold" in res.stdout and "raising the threshold from 0.9 to 0.95" in res.stdout
    assert "cautious rules ('pi', 'mean') suit it" in res.stdout
    body = json.loads((tmp_path / "c" / "decisions.jsonl").read_text().splitlines()[0])["body"]
    assert [e["rule"] for e in body["rule_picks"]] == list(RULE_ORDER)
    assert {e["threshold"] for e in body["threshold_price"]} >= {0.5, 0.8, 0.9, 0.95, 0.99}
    check = runner.invoke(app, ["check", str(PROTOCOLS / "tablet_blend.toml")])
    assert check.exit_code == 0
    assert "rule: the protocol ranks by 'ei'" in check.stdout
    assert "warning: screen.threshold 0.9 never binds" in check.stderr
    data = json.loads(runner.invoke(app, ["check", str(PROTOCOLS / "tablet_blend.toml"), "-f", "json"]).stdout)
    assert data["threshold_warnings"] and data["guidance"]


def _priced(best_own, best_next, maximize=True):
    from types import SimpleNamespace

    objective = SimpleNamespace(name="droplet", unit="um")
    protocol = SimpleNamespace(objective=objective, maximize=maximize)
    price = [{"threshold": 0.9, "own": True, "best_mean": best_own, "n_pass": 10, "n_candidates": 9005},
             {"threshold": 0.95, "own": False, "best_mean": best_next, "n_pass": 4, "n_candidates": 9005}]
    return SimpleNamespace(threshold_price=price, protocol=protocol)


@pytest.mark.parametrize(("own", "next_", "maximize", "phrase"), [
    (5.619, 5.619, False, "costs nothing in the best predicted droplet"),  # read "costs about -0 (um)"
    (5.619, 5.619 + 1e-9, True, "costs nothing in"),
    (5.0, 7.5, False, "costs about 2.5 (um) in the best predicted droplet"),
    (7.5, 5.0, True, "costs about 2.5 (um) in"),
])
def test_the_price_of_the_next_threshold_in_words(own, next_, maximize, phrase):
    from guardband.planner.app.attitude_text import price_sentence

    text = price_sentence(_priced(own, next_, maximize))
    assert phrase in text and "-0" not in text
    assert text.endswith("leaves 4 of 9,005 candidates passing")


@pytest.mark.parametrize(("maximize", "direction"), [(True, "lower"), (False, "raise")])
def test_the_price_figures_caption_says_which_way_a_higher_threshold_moves_the_curve(maximize, direction):
    """Minimising, a higher threshold can only raise the best predicted value (the caption said lower)."""
    from guardband.planner.report.attitude_figures import price_figure

    own, next_ = (7.5, 5.0) if maximize else (5.0, 7.5)
    caption = price_figure(_priced(own, next_, maximize), "salt").caption
    assert f"A higher threshold can only {direction} the curve (make the best predicted value worse)" in caption
