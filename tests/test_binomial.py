"""Binomial limits: the Laplace fit against references, the limit probability, the runs file, the screen.

References: scikit-learn's GaussianProcessClassifier (reference library; the
same Laplace approximation, Rasmussen & Williams 2006, Algorithms 3.1 and
3.2, with the Bernoulli likelihood on one 0/1 row per subject) and the
Beta posterior of a lone binomial proportion (scipy.stats.beta).
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from scipy.special import expit
from sklearn.gaussian_process import GaussianProcessClassifier
from sklearn.gaussian_process.kernels import ConstantKernel, Matern
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import ProtocolError, RunsDataError
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.inputs.runs import parse_runs_text
from guardband.planner.models.binomial import BinomialHyperparameters, fit_binomial_gp, logit, rate_band
from guardband.safety.limits import LimitRule, ScreenRules
from guardband.safety.screen import limit_predictions, limit_probability, probabilities_at

ROOT = Path(__file__).resolve().parents[1]
DOSE = ROOT / "protocols" / "dose_combination.toml"

# cohorts of six along one unit-scaled dose, events rising with the dose
X6 = np.array([[0.0], [0.2], [0.4], [0.6], [0.8], [1.0]])
K6 = np.array([0, 0, 1, 2, 3, 5.0])
N6 = np.full(6, 6.0)


def _sklearn_gpc(X, k, n, length_scale, signal_variance):
    """The same data as one 0/1 row per subject, the same fixed kernel, zero prior mean."""
    Xe = np.repeat(X, n.astype(int), axis=0)
    ye = np.concatenate([[1] * int(ki) + [0] * int(ni - ki) for ki, ni in zip(k, n)])
    kernel = ConstantKernel(signal_variance, "fixed") * Matern(length_scale, "fixed", nu=2.5)
    return GaussianProcessClassifier(kernel, optimizer=None).fit(Xe, ye)


@pytest.mark.parametrize("length_scale, signal_variance", [(0.4, 2.0), (0.15, 6.0), (1.0, 0.5)])
def test_laplace_fit_matches_sklearn_classifier(length_scale, signal_variance):
    # reference library: sklearn GaussianProcessClassifier (Laplace, Bernoulli rows).
    # Subjects at one dose share one latent value, so the Bernoulli fit on 36
    # rows and the binomial fit on 6 counts have the same posterior mode and
    # predictive. Tolerance 1e-9 (absolute, logit units): both Newton searches
    # stop when the objective changes by less than 1e-10 nats, near the mode
    # where the error in f is quadratic-convergence small (measured: 2e-14).
    hp = BinomialHyperparameters(np.array([length_scale]), signal_variance)
    ours = fit_binomial_gp(X6, K6, N6, prior_mean=0.0, hyperparameters=hp)
    ref = _sklearn_gpc(X6, K6, N6, length_scale, signal_variance)
    mode_ref = ref.base_estimator_.f_cached[np.cumsum(N6.astype(int)) - 1]
    np.testing.assert_allclose(ours.mode.g, mode_ref, atol=1e-9)
    Xs = np.linspace(-0.2, 1.6, 19)[:, None]
    mean, sd = ours.predict(Xs)
    ref_mean, ref_var = ref.latent_mean_and_variance(Xs)
    np.testing.assert_allclose(mean, ref_mean, atol=1e-9)
    np.testing.assert_allclose(sd**2, ref_var, atol=1e-9)


def test_laplace_fit_two_factors_matches_sklearn_classifier():
    # reference library: as above (tolerance 1e-9), two factors with one length scale each (ARD)
    rng = np.random.default_rng(4)
    X = rng.uniform(size=(8, 2))
    n = rng.integers(3, 7, size=8).astype(float)
    k = np.array([rng.binomial(int(m), p) for m, p in zip(n, expit(-1 + 2 * X.sum(axis=1)))], float)
    hp = BinomialHyperparameters(np.array([0.3, 0.7]), 1.5)
    ours = fit_binomial_gp(X, k, n, prior_mean=0.0, hyperparameters=hp)
    ref = _sklearn_gpc(X, k, n, np.array([0.3, 0.7]), 1.5)
    Xs = rng.uniform(-0.2, 1.2, size=(25, 2))
    mean, sd = ours.predict(Xs)
    ref_mean, ref_var = ref.latent_mean_and_variance(Xs)
    np.testing.assert_allclose(mean, ref_mean, atol=1e-9)
    np.testing.assert_allclose(sd**2, ref_var, atol=1e-9)


# A lone cohort: with the prior N(0, pi^2) on the logit of the rate (the
# mean and variance of the logit of a Jeffreys Beta(1/2, 1/2) rate:
# 2 * trigamma(1/2) = pi^2) and no other run within many length scales,
# the model's P(rate <= L) should be close to the Beta(k + 1/2, n - k + 1/2)
# posterior (scipy.stats.beta). It is not equal: the logit-normal prior only
# matches Jeffreys' first two moments, and the Laplace method replaces the
# skewed posterior of the logit by a Gaussian at its mode. Measured gaps
# (Beta minus ours): at most 0.027 for 1 <= k < n with n >= 6; with k = 0,
# where the posterior is most skewed, 0.046 to 0.070, always on the
# cautious side. Tolerances: 0.03, and for k = 0 below the Beta by at most 0.08.
LONE = BinomialHyperparameters(np.array([0.05]), float(np.pi**2))


@pytest.mark.parametrize("k, n", [(1, 6), (2, 12), (3, 12), (6, 24), (3, 30), (10, 30), (9, 36)])
@pytest.mark.parametrize("L", [0.1, 0.25, 0.4])
def test_lone_cohort_close_to_jeffreys_beta(k, n, L):
    far = np.array([[0.0], [1.0]])  # a second cohort 20 length scales away changes nothing
    model = fit_binomial_gp(far, [k, 1], [n, 4], prior_mean=0.0, hyperparameters=LONE)
    mean, sd = model.predict(far[:1])
    p = float(limit_probability(mean, sd, upper=L, scale="logit")[0])
    assert p == pytest.approx(stats.beta.cdf(L, k + 0.5, n - k + 0.5), abs=0.03)


@pytest.mark.parametrize("n", [6, 30])
@pytest.mark.parametrize("L", [0.1, 0.25, 0.4])
def test_lone_cohort_without_events_is_cautious(n, L):
    model = fit_binomial_gp(np.array([[0.0]]), [0], [n], prior_mean=0.0, hyperparameters=LONE)
    mean, sd = model.predict(np.array([[0.0]]))
    p = float(limit_probability(mean, sd, upper=L, scale="logit")[0])
    ref = stats.beta.cdf(L, 0.5, n + 0.5)
    assert ref - 0.08 <= p <= ref


def test_logit_probability_is_the_rate_probability():
    # P(rate <= L) = P(f <= logit L) for f ~ N(mu, sd^2), checked by sampling the rate (numpy)
    rng = np.random.default_rng(1)
    f = rng.normal(-1.0, 0.8, size=400_000)
    p = float(limit_probability(-1.0, 0.8, upper=0.3, scale="logit"))
    assert p == pytest.approx(np.mean(expit(f) <= 0.3), abs=0.003)
    p2 = float(limit_probability(-1.0, 0.8, lower=0.1, upper=0.3, scale="logit"))
    assert p2 == pytest.approx(np.mean((expit(f) >= 0.1) & (expit(f) <= 0.3)), abs=0.003)


def test_rates_shown_stay_in_unit_interval():
    model = fit_binomial_gp(X6, K6, N6, prior_mean=float(logit(0.25)),
                            hyperparameters=BinomialHyperparameters(np.array([0.3]), 9.0))
    Xs = np.linspace(-3, 4, 50)[:, None]
    for values in (*model.predict_rate(Xs), *rate_band(*model.predict(Xs))):
        assert np.all((values >= 0) & (values <= 1))
    loo = model.loo()
    for values in (loo.mean, loo.lo, loo.hi):
        assert np.all((values >= 0) & (values <= 1))
    assert np.all(loo.lo <= loo.hi)


def test_untried_dose_far_from_runs_claims_nothing():
    # the prior mean sits at the limit's logit: far from every cohort P = 1/2
    model = fit_binomial_gp(X6[:2], [0, 0], [6, 6], prior_mean=float(logit(0.25)),
                            hyperparameters=BinomialHyperparameters(np.array([0.1]), 4.0))
    mean, sd = model.predict(np.array([[5.0]]))
    assert float(limit_probability(mean, sd, upper=0.25, scale="logit")[0]) == pytest.approx(0.5, abs=1e-9)


def _single_agent_protocol(monotone: bool):
    return parse_protocol({
        "study": {"title": "t", "version": "1", "author": "a", "kind": "dose"},
        "factors": [{"name": "dose", "kind": "discrete", "levels": [5, 10, 20, 40, 80]}],
        "objective": {"name": "response", "direction": "maximize"},
        "limits": [{"name": "dlt", "kind": "binomial", "events": "dlt_n", "subjects": "n", "upper": 0.25,
                    "probability": 0.9, "monotone": monotone}],
        "screen": {"threshold": 0.9, "min_runs": 1},
    })


@pytest.mark.parametrize("monotone", [False, True])
def test_no_events_in_six_does_not_clear_two_levels_above(monotone):
    # issue 16: after 0 of 6 at one dose, a dose two levels above (never given)
    # is not passed at threshold 0.9; the hyperparameters are fitted as in a plan
    p = _single_agent_protocol(monotone)
    rules = ScreenRules.from_protocol(p)
    space = p.design_space()
    U = space.to_unit(np.array([[10.0]]))
    model = fit_binomial_gp(U, [0], [6], prior_mean=rules.limits[0].prior_mean, rng=0,
                            length_scale_max=p.model.limit_length_scale_max)
    C = np.array([[5.0], [10.0], [20.0], [40.0], [80.0]])
    P, _ = probabilities_at(limit_predictions(rules.limits, [model], space.to_unit(C)), len(C))
    assert P[3, 0] < 0.9  # 40: two levels above 10
    assert P[4, 0] < 0.9
    assert P[3, 0] <= P[1, 0]  # never more sure far above the cohort than at it


def test_dose_example_untried_dose_above_one_cohort():
    # the case: one cohort with 0 of 6 at (20, 2) mg/kg; (40, 2) and (80, 2) never given
    p = load_protocol(DOSE)
    rules = ScreenRules.from_protocol(p)
    space = p.design_space()
    model = fit_binomial_gp(space.to_unit(np.array([[20.0, 2.0]])), [0], [6], prior_mean=rules.limits[0].prior_mean,
                            rng=0, length_scale_max=p.model.limit_length_scale_max * np.sqrt(2))
    C = np.array([[40.0, 2.0], [80.0, 2.0], [20.0, 8.0]])
    P, _ = probabilities_at(limit_predictions(rules.limits, [model], space.to_unit(C)), len(C))
    assert np.all(P[:, 0] < 0.9)


# ------------------------------------------------------------------ protocol and runs file
def _dose_data():
    return tomllib.loads(DOSE.read_text())


def test_dose_example_limit_is_binomial_and_monotone():
    p = load_protocol(DOSE)
    lim = p.limits[0]
    assert lim.kind == "binomial" and lim.judged_on == "true-value"
    assert p.runs_columns == ("response_score", "dlt_events", "dlt_subjects")
    rule = ScreenRules.from_protocol(p).limits[0]
    assert rule.binomial and rule.monotone and not rule.with_noise
    assert rule.prior_mean == pytest.approx(np.log(0.25 / 0.75), abs=1e-15)


@pytest.mark.parametrize("change, words", [
    ({"events": None}, "needs `events` and `subjects`"),
    ({"upper": 25}, "strictly between 0 and 1"),
    ({"judged_on": "measurement"}, "judged on the true rate"),
    ({"measurement_sd": 0.1}, "`measurement_sd` does not apply"),
    ({"subjects": "dlt_events"}, "three different names"),
    ({"lower": 0.05, "monotone": True}, "needs an upper limit only"),
])
def test_binomial_limit_mistakes_are_named(change, words):
    data = _dose_data()
    lim = data["limits"][0]
    for key, value in change.items():
        if value is None:
            lim.pop(key)
        else:
            lim[key] = value
    with pytest.raises(ProtocolError, match="limits.0") as err:
        parse_protocol(data, source="dose.toml")
    assert words in str(err.value)


def test_counts_column_clash_with_factor_is_refused():
    data = _dose_data()
    data["limits"][0]["events"] = "dose_a"
    with pytest.raises(ProtocolError, match="used for a factor and a response"):
        parse_protocol(data)


HEADER = "run_id,dose_a,dose_b,response_score,dlt_events,dlt_subjects\n"


def test_counts_become_rates():
    p = load_protocol(DOSE)
    runs = parse_runs_text(HEADER + "R1,5,1,20,1,6\nR2,10,1,,,\nR3,10,2,30,0,3\n", p)
    np.testing.assert_allclose(runs.Y["dlt_rate"], [1 / 6, np.nan, 0.0])
    events, subjects = runs.counts["dlt_rate"]
    np.testing.assert_array_equal(events[[0, 2]], [1, 0])
    np.testing.assert_array_equal(subjects[[0, 2]], [6, 3])
    assert "dlt_events" not in runs.Y


@pytest.mark.parametrize("cells, words", [
    ("2,,", "give both counts"),
    ("7,6", "between 0 and the number of subjects"),
    ("1.5,6", "whole numbers"),
    ("0,0", "at least 1"),
    ("-1,6", "between 0 and the number of subjects"),
])
def test_bad_counts_are_refused_naming_row_and_columns(cells, words):
    p = load_protocol(DOSE)
    text = HEADER + "R1,5,1,20,0,6\nR2,10,1,25," + cells + "\n"
    with pytest.raises(RunsDataError) as err:
        parse_runs_text(text.replace(",,\n", ",\n") if cells.endswith(",,") else text, p, source="runs.csv")
    msg = str(err.value)
    assert "row 3 (run R2)" in msg and "dlt_events/dlt_subjects" in msg and words in msg


def test_rate_column_refused_with_exit_code_4(tmp_path):
    runs = tmp_path / "runs.csv"
    runs.write_text("run_id,dose_a,dose_b,response_score,dlt_rate\nR1,5,1,20,0.1667\nR2,10,1,25,0\n"
                    "R3,0,0,12,0\nR4,10,2,30,0\n")
    res = CliRunner().invoke(app, ["plan", str(DOSE), str(runs), "--out", str(tmp_path / "o")])
    assert res.exit_code == 4
    assert "'dlt_rate' is a binomial response" in res.stderr
    assert "'dlt_events'" in res.stderr and "'dlt_subjects'" in res.stderr
    assert not (tmp_path / "o").exists()  # nothing written


@pytest.mark.parametrize("missing", ["dlt_subjects", "dlt_events"])
def test_a_missing_count_column_is_one_problem_not_one_per_row(tmp_path, missing):
    """The absent column is the one cause; no row is blamed for the count it cannot hold."""
    full = HEADER + "R1,5,1,20,1,6\nR2,10,1,25,0,6\nR3,10,2,30,0,3\n"
    drop = HEADER.strip().split(",").index(missing)
    runs = tmp_path / "runs.csv"
    runs.write_text("".join(",".join(c for j, c in enumerate(line.split(",")) if j != drop) + "\n"
                            for line in full.splitlines()))
    res = CliRunner().invoke(app, ["plan", str(DOSE), str(runs), "--out", str(tmp_path / "o")])
    assert res.exit_code == 4
    assert "runs.csv: 1 problem found" in res.stderr, res.stderr
    assert f"missing column {missing!r}" in res.stderr
    assert "give both counts" not in res.stderr
    assert not (tmp_path / "o").exists()  # nothing written


@pytest.mark.parametrize("missing, role", [("dlt_subjects", "the subjects column"),
                                           ("dlt_events", "the events column")])
def test_a_missing_count_column_names_its_response_and_which_count_it_is(missing, role):
    header = HEADER.strip().split(",")
    kept = [j for j, name in enumerate(header) if name != missing]
    text = "\n".join(",".join(line.split(",")[j] for j in kept)
                     for line in (HEADER + "R1,5,1,20,1,6\n").splitlines()) + "\n"
    with pytest.raises(RunsDataError) as err:
        parse_runs_text(text, load_protocol(DOSE))
    assert f"missing column {missing!r} ({role} of the limit 'dlt_rate')" in str(err.value)


def test_starting_design_template_has_count_columns(tmp_path):
    res = CliRunner().invoke(app, ["start", str(DOSE), "--runs", "4", "--out", str(tmp_path / "start.csv")])
    assert res.exit_code == 0, res.output
    header = [ln for ln in (tmp_path / "start.csv").read_text().splitlines() if not ln.startswith("#")][0]
    assert header.split(",")[3:6] == ["response_score", "dlt_events", "dlt_subjects"]


def test_limit_rule_defaults_stay_gaussian():
    rule = LimitRule("a", None, 1.0, 0.9)
    assert not rule.binomial and not rule.monotone and rule.scale == "response" and rule.prior_mean == 1.0


def test_dose_example_slices_and_model_checks_show_rates_inside_unit_interval():
    from guardband.planner.inputs.runs import read_runs
    from guardband.planner.models.checks import loo_interval
    from guardband.planner.report.data import slice_data
    from guardband.planner.step import plan_step

    p = load_protocol(DOSE)
    runs = read_runs(ROOT / "protocols" / "dose_combination_runs.csv", p)
    result = plan_step(p, runs, seed=2, pool_size=300)
    assert result.proposals
    x0 = result.proposals[0].x
    for factor in ("dose_a", "dose_b"):
        sl = slice_data(result, x0, factor)
        centre, lo, hi = sl.band("dlt_rate")
        assert np.all((lo >= 0) & (lo <= centre) & (centre <= hi) & (hi <= 1))
        assert np.any(hi > 0.25)  # the doses never given are uncertain, and the band says so
    lo, hi, inside = loo_interval(result.fitted["dlt_rate"])
    assert np.all((lo >= 0) & (hi <= 1) & (lo <= hi))


def test_plan_excludes_doses_at_or_above_a_cohort_that_broke_the_limit():
    # the dose example with R06 at (10, 1) mg/kg coming back 3 of 6: every candidate with
    # dose_a >= 10 and dose_b >= 1 is excluded for that reason, and none is proposed
    p = load_protocol(DOSE)
    text = (ROOT / "protocols" / "dose_combination_runs.csv").read_text().replace(
        "R06,10,1,37.3283,0,6", "R06,10,1,37.3283,3,6")
    runs = parse_runs_text(text, p)
    from guardband.planner.step import plan_step

    result = plan_step(p, runs, seed=5, pool_size=300)
    X, reason = result.pool, result.screen.reason
    above = (X[:, 0] >= 10) & (X[:, 1] >= 1)
    assert np.any(above)
    hard = {"outside-design-space", "forbidden-region", "step-too-large", "beyond-tested-span",
            "skips-untried-level"}
    assert all(r == "above-broken-cohort" or r in hard for r in reason[above])
    assert np.any(reason[above] == "above-broken-cohort")
    assert np.all(result.screen.P[above, 0] == 0.0)
    assert not any((q.x[0] >= 10) and (q.x[1] >= 1) for q in result.proposals)


def test_broken_dose_is_judged_on_all_its_subjects():
    # trade practice: a dose level is judged on all its subjects (3+3: "2 or more of 6")
    model = fit_binomial_gp(np.array([[0.2], [0.2], [0.5]]), [1, 0, 0], [3, 3, 1], prior_mean=float(logit(0.25)),
                            hyperparameters=BinomialHyperparameters(np.array([0.3]), 4.0))
    X, mean, sd, rates, subjects = model.runs_view()
    np.testing.assert_array_equal(X[:, 0], [0.2, 0.5])
    np.testing.assert_allclose(rates, [1 / 6, 0.0])
    np.testing.assert_array_equal(subjects, [6, 1])
    np.testing.assert_allclose(mean, model.predict(X)[0])


@pytest.mark.parametrize("broken_after, excluded", [(None, True), (6, True), (9, False)])
def test_broken_after_waits_for_enough_subjects(broken_after, excluded):
    # 2 of 6 at (10, 1): broken by default and with broken_after = 6; with 9 not yet (six treated)
    data = _dose_data()
    if broken_after is not None:
        data["limits"][0]["broken_after"] = broken_after
    p = parse_protocol(data)
    text = (ROOT / "protocols" / "dose_combination_runs.csv").read_text().replace(
        "R06,10,1,37.3283,0,6", "R06,10,1,37.3283,2,6")
    runs = parse_runs_text(text, p)
    rules = ScreenRules.from_protocol(p)
    space = p.design_space()
    U = space.to_unit(runs.X)
    events, subjects = runs.counts["dlt_rate"]
    model = fit_binomial_gp(U, events, subjects, prior_mean=rules.limits[0].prior_mean,
                            hyperparameters=BinomialHyperparameters(np.array([0.3, 0.3]), 4.0))
    preds = limit_predictions(rules.limits, [model], space.to_unit(np.array([[10.0, 1.0], [20.0, 2.0]])))
    P, _ = probabilities_at(preds, 2)
    assert bool(np.all(P[:, 0] == 0.0)) is excluded


def test_a_starting_design_with_more_runs_than_settings_names_its_repeats():
    """The dose example's starting region holds 9 level combinations: of 12 runs, 3 repeat a
    setting, and the notes say which (they were all labelled space-filling, repeats unsaid)."""
    from guardband.planner.app.workflow import start_design

    p = load_protocol(DOSE)
    _, rows, notes = start_design(p, 12, seed=0)
    X = [tuple(r[1:3]) for r in rows]
    repeats = [r[0] for k, r in enumerate(rows) if tuple(r[1:3]) in X[:k]]
    assert len(set(X)) == 9 and len(repeats) == 3
    note = next(n for n in notes if "repeat" in n)
    for rid in repeats:
        assert rid in note
    assert "replicates" in note
    _, rows, notes = start_design(p, 4, seed=0)
    assert len({tuple(r[1:3]) for r in rows}) == 4 and not any("repeat" in n for n in notes)
