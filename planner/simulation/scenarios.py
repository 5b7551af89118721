"""Scenario files: the "true" responses of an author's own protocol, for simulated campaigns.

A scenario file (TOML) states one or more named truths for one protocol::

    start_runs = 10          # optional: starting runs per campaign (default 10)
    budget = 20              # optional: planned runs per campaign (default 30)

    [[scenario]]
    name = "expected"
    note = "what we believe today"
    [scenario.truth]         # one formula per response of the protocol
    dissolution_30min = "100 * (1 - exp(-(0.4 + 30 * croscarmellose)))"
    degradant_b = "0.05 + 1.5 * povidone"
    friability = "0.2 + 12 / force ^ 2"
    [scenario.noise]         # optional: measurement sd per response
    dissolution_30min = 1.5  # default: the protocol's measurement_sd, else none
    [scenario.cohort]        # optional: a rate measured as a count out of a cohort
    dlt_rate = 6

    [[scenario]]
    name = "like-the-runs"
    draw_from_runs = "tablet_blend_runs.csv"   # relative to this file

Formulas are read by :mod:`planner.simulation.formulas` (no ``eval``) over
the protocol's factor names. A ``draw_from_runs`` scenario fits one model
per response to the runs already made and draws, for every campaign, a new
continuous sample path of each (:mod:`planner.simulation.paths`); its noise
defaults to the fitted model's.

Every scenario becomes a :class:`~planner.simulation.problems.Problem` on
the protocol's own factors, limits and settings, whose best point meeting
every limit is found by :func:`~planner.simulation.problems.locate_optimum`
(the one optimum search of the built-in problems), so gaps are known.

A bad file raises :class:`~planner.errors.ProtocolError` (exit code 3)
naming the file and the field path (``scenario[1].truth.degradant_b``); a
bad runs file raises :class:`~planner.errors.RunsDataError` (exit code 4).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from guardband.planner import settings
from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.reading import read_toml
from guardband.planner.inputs.protocol import Protocol, _format_loc, _plain
from guardband.planner.simulation.formulas import FormulaError, parse_formula
from guardband.planner.simulation.problems import Problem, _discrete_grid, locate_optimum

__all__ = ["Scenario", "ScenarioSet", "load_scenarios", "parse_scenarios", "FormulaTruth", "PathTruth",
           "CHECK_POINTS", "DRAW_OPTIMUM_SAMPLES"]

#: Points of the design space at which every formula is checked for finite values.
CHECK_POINTS = 2000
#: Dense sample (and SLSQP starts) of the optimum search of one drawn truth.
DRAW_OPTIMUM_SAMPLES = 10_000
DRAW_OPTIMUM_POLISH = 3


# ------------------------------------------------------------------ schema
class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class ScenarioEntry(_Strict):
    """One ``[[scenario]]`` table, before it is checked against the protocol."""

    name: str = Field(min_length=1, max_length=80, pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    note: str = ""
    truth: dict[str, str] = Field(default_factory=dict)
    draw_from_runs: str | None = None
    noise: dict[str, float] = Field(default_factory=dict)
    cohort: dict[str, int] = Field(default_factory=dict)


#: Where a scenario file's keys are described, for the message on a key it does not know.
SCENARIO_KEYS_DOC = 'the README, "Simulating your own study"'


class ScenarioFile(_Strict):
    """A whole scenario file."""

    start_runs: int = Field(10, ge=3, le=10000)
    budget: int = Field(30, ge=1, le=10000)
    scenario: list[ScenarioEntry] = Field(min_length=1)


# ------------------------------------------------------------------ truths
@dataclass(frozen=True)
class FormulaTruth:
    """``evaluate(X)``: every response's formula at runs X (protocol units), shape (n, n_factors)."""

    factor_names: tuple[str, ...]
    formulas: tuple  # (response, Formula) pairs

    def __call__(self, X) -> dict:
        X = np.atleast_2d(np.asarray(X, dtype=float))
        columns = {name: X[:, j] for j, name in enumerate(self.factor_names)}
        return {r: f({n: columns[n] for n in f.names} or {"": X[:, 0]}) for r, f in self.formulas}


@dataclass(frozen=True)
class PathTruth:
    """``evaluate(X)``: one sample path per response, at runs X (protocol units).

    The paths take the free factors scaled to the unit cube by their real
    ranges, as the planner's models do (``DesignSpace.to_unit``).
    """

    free: np.ndarray  # bool mask of the free factors
    low: np.ndarray  # their real lower ends
    width: np.ndarray  # and widths
    paths: tuple  # (response, PosteriorPath) pairs

    def __call__(self, X) -> dict:
        U = (np.atleast_2d(np.asarray(X, dtype=float))[:, self.free] - self.low) / self.width
        return {r: p(U) for r, p in self.paths}


# --------------------------------------------------------------- scenarios
@dataclass(frozen=True)
class Scenario:
    """One named truth of a protocol.

    Attributes
    ----------
    name, note : str
    problem : Problem
        For a formula scenario, the problem itself (optimum known); for a
        drawn one, a template whose truth is drawn per campaign
        (:meth:`problem_for`).
    models : tuple
        (response, fitted GaussianProcess) pairs of a drawn scenario; empty otherwise.
    """

    name: str
    note: str
    problem: Problem
    models: tuple = ()

    @property
    def drawn(self) -> bool:
        return bool(self.models)

    def problem_for(self, base_seed: int, seed_index: int) -> Problem:
        """The problem one campaign runs on: the scenario's own, or a new draw with its optimum."""
        if not self.drawn:
            return self.problem
        from guardband.planner.simulation.paths import posterior_path

        rng = np.random.default_rng(np.random.SeedSequence(int(base_seed), spawn_key=(int(seed_index), 2)))
        space = self.problem.protocol.design_space()
        free, ranges = np.asarray(space.free, dtype=bool), np.asarray(space.check().ranges, dtype=float)
        truth = PathTruth(free, ranges[free, 0], ranges[free, 1] - ranges[free, 0],
                          tuple((r, posterior_path(m, rng)) for r, m in self.models))
        draft = dataclasses.replace(self.problem, evaluate=truth, name=f"{self.name}#{seed_index}")
        return _with_optimum(draft, n_samples=DRAW_OPTIMUM_SAMPLES, n_polish=DRAW_OPTIMUM_POLISH,
                             where=f"scenario {self.name!r}, draw {seed_index}")


@dataclass(frozen=True)
class ScenarioSet:
    """The scenarios of one file, with the campaign sizes it suggests."""

    source: str
    protocol: Protocol
    scenarios: tuple[Scenario, ...]
    start_runs: int
    budget: int


def _with_optimum(problem: Problem, *, where: str, **options) -> Problem:
    try:
        found = locate_optimum(problem, **options)
    except ValueError as exc:
        raise ProtocolError(f"{where}: {exc}; no point of the design space meets every limit "
                            "under this truth, so no gap can be measured") from None
    return dataclasses.replace(problem, optimum=found.value, optimum_x=tuple(float(v) for v in found.x),
                               optimum_method=f"locate_optimum: {found.method}",
                               tags={**problem.tags, "objective_range": found.objective_range})


def _noise(protocol: Protocol, entry: ScenarioEntry, fitted: dict) -> dict:
    """Measurement sd per response: the scenario's, else the protocol's, else the fitted model's, else 0."""
    out = {}
    for item in [protocol.objective, *protocol.limits]:
        if item.name in entry.noise:
            out[item.name] = float(entry.noise[item.name])
        elif item.measurement_sd is not None:
            out[item.name] = float(item.measurement_sd)
        else:
            out[item.name] = float(fitted.get(item.name, 0.0))
    return out


def _check_keys(source: str, path: str, keys, allowed, what: str) -> None:
    for key in keys:
        if key not in allowed:
            raise ProtocolError(f"{source}: {path}.{key}: not a {what} of the protocol "
                                f"({', '.join(allowed)})")


def _formula_truth(source: str, path: str, protocol: Protocol, entry: ScenarioEntry) -> FormulaTruth:
    names = protocol.response_names
    _check_keys(source, f"{path}.truth", entry.truth, names, "response")
    missing = [r for r in names if r not in entry.truth]
    if missing:
        raise ProtocolError(f"{source}: {path}.truth: no formula for {', '.join(missing)}; "
                            "every response of the protocol needs one")
    formulas = []
    for r in names:
        try:
            formulas.append((r, parse_formula(entry.truth[r], protocol.factor_names)))
        except FormulaError as exc:
            raise ProtocolError(f"{source}: {path}.truth.{r}: cannot read the formula: {exc}") from None
    return FormulaTruth(tuple(protocol.factor_names), tuple(formulas))


def _check_values(source: str, path: str, protocol: Protocol, truth, cohort: dict) -> None:
    """Refuse a truth that is not finite on the design space, or a rate outside [0, 1]: a cohort
    rate, or the true rate of a binomial response (objective or limit)."""
    space = protocol.design_space()
    X = space.sample(CHECK_POINTS, rng=np.random.default_rng(0))
    levels = _level_grid(space)
    if levels is not None:  # every level combination too: a rate may leave [0, 1] at one corner only
        X = np.vstack([X, levels])
    Y = truth(X)
    rates = {item.name for item in protocol.binomial_responses}
    for r, v in Y.items():
        bad = ~np.isfinite(v)
        if np.any(bad):
            at = ", ".join(f"{n}={x:.6g}" for n, x in zip(protocol.factor_names, X[np.argmax(bad)]))
            raise ProtocolError(f"{source}: {path}.truth.{r}: the formula is not a finite number at {at} "
                                "(log or sqrt of a negative number, or a division by zero?)")
        out = (v < 0) | (v > 1)
        if r in rates and np.any(out):
            at = ", ".join(f"{n}={x:.6g}" for n, x in zip(protocol.factor_names, X[np.argmax(out)]))
            raise ProtocolError(f"{source}: {path}.truth.{r}: {r!r} is a binomial response, so its formula is "
                                f"the true rate and must lie in [0, 1]; it ranges over [{np.min(v):.4g}, "
                                f"{np.max(v):.4g}] (at {at} it is {v[np.argmax(out)]:.4g}); write it through "
                                "logistic(...), for example logistic(-3 + 0.05 * dose)")
        if r in cohort and np.any(out):
            raise ProtocolError(f"{source}: {path}.cohort.{r}: a rate measured out of a cohort must lie "
                                f"in [0, 1]; the formula ranges over [{np.min(v):.4g}, {np.max(v):.4g}]")


def _level_grid(space, most: int = 20_000):
    """Every level combination in the space (:func:`problems._discrete_grid`) when every factor is
    discrete and they are at most ``most``, else None."""
    if len(space.levels or {}) < space.n_factors:
        return None
    if np.prod([len(space.levels[j]) for j in range(space.n_factors)]) > most:
        return None
    return _discrete_grid(space)


def _cohort(source: str, path: str, protocol: Protocol, entry: ScenarioEntry) -> dict:
    """Subjects per run of each rate: the scenario's, else (a binomial response) the protocol's cohort size."""
    out = dict(entry.cohort)
    size = protocol.escalation.cohort_size if protocol.escalation is not None else None
    for item in protocol.binomial_responses:
        if item.name in entry.noise:
            raise ProtocolError(f"{source}: {path}.noise.{item.name}: {item.name!r} is a binomial response; "
                                "its spread comes from the counts (events ~ Binomial(subjects, true rate)), "
                                "so it takes no noise; remove it")
        if item.name not in out:
            if size is None:
                raise ProtocolError(f"{source}: {path}.cohort.{item.name}: {item.name!r} is a binomial response: "
                                    f"give its subjects per run ({item.name} = 6 in [scenario.cohort]) or "
                                    "escalation.cohort_size in the protocol")
            out[item.name] = int(size)
    return out


def _fitted_models(source: str, path: str, protocol: Protocol, runs_path: Path) -> tuple[tuple, dict]:
    """One plain model per response fitted to the runs, and each model's noise sd (response units)."""
    from guardband.planner.inputs.runs import read_runs
    from guardband.planner.models.gp import fit_gp
    from guardband.planner.step.result import Scaler

    runs = read_runs(runs_path, protocol)
    U = Scaler(protocol.design_space()).unit(runs.X)
    models, noise = [], {}
    sds = {protocol.objective.name: protocol.objective.measurement_sd}
    sds.update({lim.name: lim.measurement_sd for lim in protocol.limits})
    for r in protocol.response_names:
        m = runs.measured(r) & ~runs.pending
        if int(m.sum()) < 3:
            raise ProtocolError(f"{source}: {path}.draw_from_runs: {runs_path.name} has {int(m.sum())} "
                                f"measured {r!r} value(s); at least 3 are needed to draw a truth like them")
        model = fit_gp(U[m], runs.Y[r][m], n_restarts=protocol.model.restarts, rng=0, noise_sd=sds[r])
        models.append((r, model))
        noise[r] = model.scale * math.sqrt(model.hyperparameters.noise_variance)
    return tuple(models), noise


def _scenario(source: str, k: int, protocol: Protocol, entry: ScenarioEntry, folder: Path) -> Scenario:
    path = f"scenario[{k}]"
    names = protocol.response_names
    _check_keys(source, f"{path}.noise", entry.noise, names, "response")
    _check_keys(source, f"{path}.cohort", entry.cohort, [lim.name for lim in protocol.limits] +
                [protocol.objective.name], "response")
    for key, sd in entry.noise.items():
        if not (math.isfinite(sd) and sd >= 0):
            raise ProtocolError(f"{source}: {path}.noise.{key}: must be a finite number >= 0 (got {sd!r})")
    for key, m in entry.cohort.items():
        if m < 1:
            raise ProtocolError(f"{source}: {path}.cohort.{key}: a cohort has at least 1 member (got {m})")
    if bool(entry.truth) == (entry.draw_from_runs is not None):
        raise ProtocolError(f"{source}: {path}: give either truth (one formula per response) or "
                            "draw_from_runs (a runs file), not both and not neither")
    models, fitted = (), {}
    cohort = _cohort(source, path, protocol, entry)
    if entry.truth:
        truth = _formula_truth(source, path, protocol, entry)
        _check_values(source, path, protocol, truth, cohort)
    else:
        if protocol.binomial_responses:
            raise ProtocolError(f"{source}: {path}.draw_from_runs: drawn truths are not available for a "
                                "protocol with binomial responses (they would be drawn as Gaussian values, "
                                "not rates); state each true rate as a formula in [scenario.truth]")
        models, fitted = _fitted_models(source, path, protocol, folder / entry.draw_from_runs)
        truth = None
    problem = Problem(
        name=entry.name, source=f"scenario {entry.name!r} of {source}" + (f": {entry.note}" if entry.note else ""),
        protocol_dict=protocol.model_dump(mode="python"), evaluate=truth, optimum=math.nan, optimum_x=(),
        noise=_noise(protocol, entry, fitted), cohort=cohort,
    )
    if truth is not None:
        problem = _with_optimum(problem, where=f"{source}: {path}")
    return Scenario(entry.name, entry.note, problem, models)


def parse_scenarios(data: dict, protocol: Protocol, *, source: str = "scenarios",
                    folder: str | Path = ".") -> ScenarioSet:
    """Validate a scenario file given as a dict (parsed TOML) against its protocol.

    Parameters
    ----------
    data : dict
    protocol : Protocol
    source : str
        The file's name, for messages.
    folder : path
        Where ``draw_from_runs`` paths are read from.

    Raises
    ------
    ProtocolError
        Naming ``source``, the field path and what to change.
    RunsDataError
        When a ``draw_from_runs`` file is bad.
    """
    try:
        parsed = ScenarioFile.model_validate(data)
    except ValidationError as exc:
        raise ProtocolError("\n".join(f"{source}: {_format_loc(e['loc'])}: "
                                      f"{_plain(e, ScenarioFile, SCENARIO_KEYS_DOC)}"
                                      for e in exc.errors())) from None
    seen = set()
    for k, entry in enumerate(parsed.scenario):
        if entry.name in seen:
            raise ProtocolError(f"{source}: scenario[{k}].name: {entry.name!r} is used twice; names must differ")
        seen.add(entry.name)
    scenarios = tuple(_scenario(source, k, protocol, e, Path(folder)) for k, e in enumerate(parsed.scenario))
    return ScenarioSet(source, protocol, scenarios, parsed.start_runs, parsed.budget)


def load_scenarios(path: str | Path, protocol: Protocol) -> ScenarioSet:
    """Read and validate a scenario file against its protocol (see :func:`parse_scenarios`)."""
    path = Path(path)
    data = read_toml(path, what="scenario", error=ProtocolError, max_bytes=settings.MAX_PROTOCOL_BYTES,
                     max_nesting=settings.MAX_PROTOCOL_NESTING)
    return parse_scenarios(data, protocol, source=path.name, folder=path.parent)
