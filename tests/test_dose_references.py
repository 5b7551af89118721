"""The dose-finding benchmark's own references, checked against their definitions.

``benchmarks/dose_finding.py`` writes the 3+3 design (trade practice) and the
one-parameter power-model CRM (O'Quigley, Pepe & Fisher 1990) itself; these
checks keep its figures honest.
"""

from __future__ import annotations

import importlib.util
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats

ROOT = Path(__file__).resolve().parents[1]
spec = importlib.util.spec_from_file_location("dose_finding", ROOT / "benchmarks" / "dose_finding.py")
dose_finding = importlib.util.module_from_spec(spec)
spec.loader.exec_module(dose_finding)


@pytest.mark.parametrize("p", [0.1, 0.25, 0.4])
def test_three_plus_three_escalates_with_the_textbook_probability(p):
    # trade practice: from a level with DLT rate p the 3+3 escalates on 0 of 3, or on 1 of 3 followed
    # by 0 of 3 more: (1 - p)^3 + 3 p (1 - p)^2 (1 - p)^3 (the standard calculation; from memory)
    exact = (1 - p) ** 3 + 3 * p * (1 - p) ** 2 * (1 - p) ** 3
    rng = np.random.default_rng(3)
    rates = [p, 1.0, 1.0, 1.0, 1.0, 1.0]
    n = 4000
    reached = np.mean([2 in dose_finding.three_plus_three(rates, rng)[0] for _ in range(n)])
    assert abs(reached - exact) <= 4 * math.sqrt(exact * (1 - exact) / n)


def test_three_plus_three_selects_by_its_rule():
    rng = np.random.default_rng(0)
    given, events, selected = dose_finding.three_plus_three([0.0, 0.0, 1.0, 1.0, 1.0, 1.0], rng)
    assert selected == 2 and given.count(2) == 6 and given.count(3) == 3
    given, events, selected = dose_finding.three_plus_three([1.0] * 6, rng)
    assert selected is None and len(given) == 3
    given, events, selected = dose_finding.three_plus_three([0.0] * 6, rng)
    assert selected == 6 and given.count(6) == 6


def test_crm_posterior_mean_matches_quadrature():
    # reference library: scipy.integrate.quad of the power-model posterior, prior a ~ N(0, 1.34)
    s = dose_finding.SKELETON
    n = np.array([3, 3, 6, 3, 0, 0], float)
    e = np.array([0, 0, 1, 2, 0, 0], float)

    def lik(a):
        p = s ** math.exp(a)
        return float(np.prod(p**e * (1 - p) ** (n - e))) * stats.norm.pdf(a, 0, math.sqrt(1.34))

    z = integrate.quad(lik, -10, 10, epsabs=1e-14)[0]
    for i in range(6):
        ref = integrate.quad(lambda a: s[i] ** math.exp(a) * lik(a), -10, 10, epsabs=1e-14)[0] / z
        assert dose_finding.crm_posterior_means(n, e)[i] == pytest.approx(ref, abs=1e-6)


def test_true_mtd_is_the_highest_level_within_the_target():
    assert dose_finding.true_mtd([0.05, 0.25, 0.4]) == 2
    assert dose_finding.true_mtd([0.3, 0.4]) is None


def test_three_plus_three_along_the_fixed_path_selects_by_its_rule():
    # trade practice, one agent up one level at a time: certain events from the fifth combination on
    # stop there, and the fourth (six treated, none with an event) is selected
    rng = np.random.default_rng(1)
    rates = [0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 1.0]
    given, events, selected = dose_finding.path_trial(rates, rng)
    assert selected == dose_finding.PATH[3] and given.count(dose_finding.PATH[3]) == 6
    assert dose_finding.PATH[5] not in given and sum(events) == 3
    steps = np.abs(np.diff(np.array(dose_finding.PATH, float), axis=0)) > 0
    assert np.all(steps.sum(axis=1) == 1)  # each step of the path raises exactly one agent


def test_the_mtd_contour_of_the_dose_example_by_its_definition():
    protocol, found = dose_finding.dose_example()
    G = dose_finding.admissible(protocol)
    assert not np.any((G[:, 0] >= 40) & (G[:, 1] >= 8))  # the forbidden corner is never a cohort's
    assert np.all(G[:, 0] / 80 + G[:, 1] / 8 <= 1.5 + 1e-12)  # nor is a combination past the cap
    rate = found.scenarios[0].problem.evaluate(G)["dlt_rate"]
    contour = dose_finding.mtd_contour(protocol, G, rate)
    at = {tuple(g): r for g, r in zip(G.tolist(), rate)}
    a_levels, b_levels = (list(f.levels) for f in protocol.factors)
    for g, r in at.items():
        up = [(a_levels[a_levels.index(g[0]) + 1], g[1])] if g[0] != a_levels[-1] else []
        up += [(g[0], b_levels[b_levels.index(g[1]) + 1])] if g[1] != b_levels[-1] else []
        on = r <= 0.25 and all(at.get(h, 2.0) > 0.25 for h in up)
        assert (g in contour) == on, g
    # the expected truth, by hand from its formula: (20, 4) is at 0.24 and both steps up exceed 0.25
    assert (20.0, 4.0) in contour and (10.0, 4.0) not in contour
