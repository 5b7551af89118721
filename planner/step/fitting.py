"""The step's models: one GP per response, fitted side by side, each with its checks.

The objective model needs MIN_OBJECTIVE_RUNS measured runs; a binomial
objective (a rate given as counts) gets the binomial model of a limit, its
prior mean at the logit of the pooled rate (:func:`pooled_logit`). A limit model's
prior mean sits at its limit; a limit with fewer runs than the protocol
requires, or whose model cannot be fitted, vouches for nothing (fail
closed). A limit model's length scales are capped, it is widened when its
own leave-one-out check finds it overconfident and it is paired with its
shortest plausible length scales (:mod:`guardband.planner.models.limitmodel`).
The fits run on worker processes when they are big.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from guardband.planner.errors import ModelError
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.models.binomial import BinomialHyperparameters, fit_binomial_gp
from guardband.planner.models.checks import loo_summary, looks_overconfident, widen_from_loo
from guardband.planner.models.gp import Hyperparameters, fit_gp
from guardband.planner.models.limitmodel import PessimisticLimitModel
from guardband.planner.models.guards import GuardedLimitModel
from guardband.planner.models.parallel import default_workers, map_jobs
from guardband.planner.settings import LIMIT_SIGNAL_VARIANCE_MIN, REPEATED_RUN_DISTANCE, REPLICATE_SPREAD_SDS
from guardband.planner.step.result import ModelStatus, ModelSummary
from guardband.safety.limits import ScreenRules

__all__ = ["FittedModels", "fit_models", "MIN_OBJECTIVE_RUNS"]

#: The objective model needs at least this many measured runs.
MIN_OBJECTIVE_RUNS = 3
#: Worker processes that fit the response models side by side (1: in turn).
FIT_WORKERS = default_workers()
#: Fits run on worker processes only when some response has this many runs
#: (measured break-even of the process start-up: about 100 to 200 runs).
PARALLEL_FIT_MIN_RUNS = 150
#: A limit model is checked by leave-one-out (and widened if overconfident)
#: from this many runs.
LOO_WIDEN_MIN_RUNS = 5


@dataclass(frozen=True)
class FittedModels:
    """The objective model, one model (or None: cannot vouch) per limit, and their summaries."""

    objective: object
    limits: list
    summaries: list[ModelSummary]

    def unavailable(self) -> list[tuple[str, str]]:
        """(status, message) of each limit, for the screen's fail-closed messages."""
        return [(s.status, s.message) for s in self.summaries[1:]]

    def warnings(self) -> list[str]:
        """The plan's model-check messages (the coverage rule)."""
        return [f"model check: only {100 * s.loo_coverage:.0f}% of the measured {s.response!r} values "
                "lie inside their leave-one-out 95% interval; the model may be overconfident"
                for s in self.summaries if s.status == ModelStatus.OK and looks_overconfident(s.loo_coverage, s.n_runs)]


def _fit_job(job: dict):
    """One model fit, as :func:`_fit` with the job's fields (module level: runs in a worker)."""
    if "events" in job:
        return _fit_binomial(job)
    model, summary = _fit(job["response"], job["role"], job["U"], job["y"], prior_mean=job["prior_mean"],
                          restarts=job["restarts"], warm=job["warm"], seed=job["seed"],
                          length_scale_max=job["length_scale_max"],
                          ml_runs_per_hyperparameter=job["ml_runs_per_hyperparameter"], widen=job["widen"],
                          short=job["short"], noise_sd=job["noise_sd"], local=job["local"],
                          floor=job.get("floor", True))
    if model is None and job.get("ids"):
        summary = dataclasses.replace(summary, message=summary.message + repeated_runs_note(job["U"], job["ids"]))
    return model, summary


def repeat_pairs(U: np.ndarray) -> list[tuple[int, int]]:
    """Pairs (i < j) of runs at the same factor settings: within REPEATED_RUN_DISTANCE in every
    unit-scaled factor, in order."""
    if len(U) < 2:
        return []
    from scipy.spatial import cKDTree

    return sorted(cKDTree(U).query_pairs(REPEATED_RUN_DISTANCE, p=np.inf))


def repeated_runs_note(U: np.ndarray, ids) -> str:
    """"; runs at the same factor settings: A and B, ..." for runs closer than REPEATED_RUN_DISTANCE, or ""."""
    pairs = repeat_pairs(U)
    if not pairs:
        return ""
    shown = ", ".join(f"{ids[i]} and {ids[j]}" for i, j in pairs[:10])
    more = f" (and {len(pairs) - 10} more pairs)" if len(pairs) > 10 else ""
    return f"; runs at the same factor settings (unit-scaled, within {REPEATED_RUN_DISTANCE:g}): {shown}{more}"


def stated_sd_contradicted(protocol, runs, U: np.ndarray) -> list[str]:
    """For each response whose ``measurement_sd`` is stated, the pair of runs at the same settings
    (:func:`repeat_pairs`) whose values differ most, when they differ by more than
    REPLICATE_SPREAD_SDS * sqrt(2) stated sds (any difference, beyond rounding, when it is 0)."""
    pairs = repeat_pairs(U)
    if not pairs:
        return []
    out = []
    for item, what in ((protocol.objective, "[objective]"), *((lim, f"limit {lim.name!r}") for lim in protocol.limits)):
        sd = getattr(item, "measurement_sd", None)
        if sd is None or item.kind == "binomial":
            continue
        y = runs.Y[item.name]
        apart = [(abs(y[i] - y[j]), i, j) for i, j in pairs if np.isfinite(y[i]) and np.isfinite(y[j])]
        d, i, j = max(apart, default=(0.0, 0, 0))
        if d > max(REPLICATE_SPREAD_SDS * np.sqrt(2.0) * sd, 1e-9 * max(1.0, abs(y[i]))):
            out.append(f"measurement_sd check: runs {runs.run_ids[i]} and {runs.run_ids[j]} have the same settings "
                       f"but {item.name} {y[i]:.6g} and {y[j]:.6g}, {d:.6g} apart, while the {what} states "
                       f"measurement_sd = {sd:g}; the model's noise is fixed at that sd, so its figures near "
                       "these runs may be too sure: check the values or the stated repeatability")
    return out


def _fit(response, role, U, y, *, prior_mean, restarts, warm, seed, length_scale_max=None,
         ml_runs_per_hyperparameter=12.0, widen=False, short=None, noise_sd=None, local=None, floor=True):
    try:
        model = fit_gp(U, y, prior_mean=prior_mean, n_restarts=restarts, warm_start=warm, rng=seed,
                       length_scale_max=length_scale_max,
                       ml_runs_per_hyperparameter=ml_runs_per_hyperparameter, noise_sd=noise_sd)
    except ModelError as exc:
        return None, ModelSummary(response, role, int(len(y)), ModelStatus.NOT_FITTED, str(exc),
                                  prior_mean=prior_mean)
    if role == "limit" and floor:
        model = _with_signal_floor(model, U, y, prior_mean)
    sd_factor = None
    used_priors = bool(model.used_priors)
    if widen and len(y) >= LOO_WIDEN_MIN_RUNS:
        model, sd_factor = widen_from_loo(model)
    cov, rmse = loo_summary(model, y) if len(y) >= 3 else (None, None)
    short_factor = None
    if short is not None:
        model = PessimisticLimitModel.build(model, lower=short[0], upper=short[1], with_prior=used_priors)
        short_factor = model.factor
    local_factor = None
    if local is not None and (local["local"] or local["deletion"]) and len(y) >= LOO_WIDEN_MIN_RUNS:
        model = GuardedLimitModel(model, lower=local["lower"], upper=local["upper"],
                                  deletion=local["deletion"], local=local["local"],
                                  labels=local.get("labels"))
        local_factor = model.summary_factors()
    summary = ModelSummary(
        response=response, role=role, n_runs=int(len(y)), status=ModelStatus.OK,
        message=getattr(model, "message", ""), hyperparameters=model.hyperparameters.to_dict(),
        log_marginal_likelihood=float(model.log_marginal_likelihood), prior_mean=prior_mean,
        loo_coverage=cov, loo_rmse=rmse, sd_factor=sd_factor, short_factor=short_factor,
        local_factor=local_factor,
    )
    return model, summary


def _fit_binomial(job: dict):
    """A binomial response's model (a limit or the objective): a GP on the logit of the rate
    (Laplace), with no Gaussian guards.

    The guards of a Gaussian limit model (the short model, the leave-one-out
    and local widening, the single-run check) answer a Gaussian model's
    overconfidence about a response it measures with noise; a binomial
    model's uncertainty comes from the counts themselves (six subjects
    weigh what six subjects weigh), and its prior mean sits at the limit's
    logit, so far from the cohorts it claims nothing.
    """
    response, U, prior_mean, role = job["response"], job["U"], job["prior_mean"], job["role"]
    n_runs = int(len(job["events"]))
    try:
        model = fit_binomial_gp(U, job["events"], job["subjects"], prior_mean=prior_mean,
                                n_restarts=job["restarts"], warm_start=BinomialHyperparameters.from_dict(job["warm"]),
                                rng=job["seed"], length_scale_max=job["length_scale_max"],
                                ml_runs_per_hyperparameter=job["ml_runs_per_hyperparameter"],
                                cohort_size=job["cohort_size"])
    except ModelError as exc:
        return None, ModelSummary(response, role, n_runs, ModelStatus.NOT_FITTED, str(exc), prior_mean=prior_mean)
    cov, rmse = loo_summary(model, model.y) if n_runs >= 3 else (None, None)
    return model, ModelSummary(
        response=response, role=role, n_runs=n_runs, status=ModelStatus.OK, message=model.message,
        hyperparameters=model.hyperparameters.to_dict(), log_marginal_likelihood=float(model.log_marginal_likelihood),
        prior_mean=prior_mean, loo_coverage=cov, loo_rmse=rmse)


def _with_signal_floor(model, U, y, prior_mean):
    """The limit model with its signal variance raised to LIMIT_SIGNAL_VARIANCE_MIN, if below.

    The length scales and noise of the search are kept; the model is refitted
    with these hyperparameters held fixed (no search), and says so.
    """
    hp = model.hyperparameters
    if hp.signal_variance >= LIMIT_SIGNAL_VARIANCE_MIN:
        return model
    floored = Hyperparameters(hp.length_scales, LIMIT_SIGNAL_VARIANCE_MIN, hp.noise_variance)
    out = fit_gp(U, y, prior_mean=prior_mean, hyperparameters=floored)
    out.used_priors = model.used_priors
    out.message = (f"{model.message}; signal variance raised from {hp.signal_variance:.3g} to "
                   f"{LIMIT_SIGNAL_VARIANCE_MIN:g} (a limit model may not claim the response varies "
                   "less than its runs' distance from the limit)")
    return out


def _warm(warm_start: dict, name: str):
    h = warm_start.get(name)
    if h is None:
        return None
    try:
        return Hyperparameters.from_dict(h)
    except (KeyError, TypeError, ValueError):
        return None


def _seed_of(seq: np.random.SeedSequence) -> int:
    return int(seq.generate_state(1)[0])


def _jobs(protocol: Protocol, rules: ScreenRules, runs: RunsTable, U_runs, used, warm_start, children,
          n_free: int, textbook: bool = False) -> tuple[list[dict], dict[int, ModelSummary]]:
    """One fit job per response that has enough runs; a summary for each limit that has not.

    ``textbook``: Gaussian limit models as the textbook fits them (prior mean
    at the data's mean, no floor on the signal variance).
    """
    obj = protocol.objective
    m_obj = used & runs.measured(obj.name)
    n_obj = int(m_obj.sum())
    if n_obj < MIN_OBJECTIVE_RUNS:
        raise ModelError(
            f"the objective {obj.name!r} has {n_obj} measured run(s); at least "
            f"{MIN_OBJECTIVE_RUNS} are needed to plan. Make a starting design with "
            "`guardband start` and measure it first"
        )
    cohort = protocol.escalation.cohort_size if protocol.escalation is not None else None
    if obj.kind == "binomial":
        jobs = [_binomial_job(obj, None, runs, U_runs, m_obj, warm_start, children[2], None, None, cohort)]
    else:
        jobs = [dict(response=obj.name, role="objective", U=U_runs[m_obj], y=runs.Y[obj.name][m_obj],
                     ids=[runs.run_ids[i] for i in np.flatnonzero(m_obj)],
                     prior_mean=None, warm=_warm(warm_start, obj.name), seed=_seed_of(children[2]),
                     noise_sd=obj.measurement_sd, length_scale_max=None, widen=False, short=None, local=None)]
    early: dict[int, ModelSummary] = {}
    # a limit model's length scales are capped so that far from the runs it
    # returns to its prior mean (the limit) rather than carry a flat response,
    # e.g. a toxicity rate of 0 in every low-dose cohort, out to doses never
    # tried (stated per sqrt(free factor), like max_step: typical distances in
    # the unit cube grow with the square root of its dimension)
    cap = protocol.model.limit_length_scale_max * np.sqrt(max(n_free, 1))
    for k, (lim, rule) in enumerate(zip(protocol.limits, rules.limits)):
        mask = used & runs.measured(lim.name)
        n_lim, need = int(mask.sum()), protocol.min_runs_for(lim)
        if n_lim < need:
            msg = f"{n_lim} measured run(s), the protocol requires at least {need}"
            early[k] = ModelSummary(lim.name, "limit", n_lim, ModelStatus.TOO_FEW_RUNS, msg,
                                    prior_mean=rule.prior_mean)
            continue
        if lim.kind == "binomial":
            jobs.append(_binomial_job(lim, rule, runs, U_runs, mask, warm_start, children[3 + k], k, cap, cohort))
            continue
        jobs.append(dict(response=lim.name, role="limit", U=U_runs[mask], y=runs.Y[lim.name][mask],
                         ids=[runs.run_ids[i] for i in np.flatnonzero(mask)],
                         prior_mean=None if textbook else rule.prior_mean, warm=_warm(warm_start, lim.name),
                         seed=_seed_of(children[3 + k]), k=k, noise_sd=lim.measurement_sd, floor=not textbook,
                         length_scale_max=cap, widen=protocol.screen.widen_from_loo,
                         short=(lim.lower, lim.upper) if protocol.screen.short_model else None,
                         local=dict(lower=lim.lower, upper=lim.upper, local=protocol.screen.widen_locally,
                                    deletion=protocol.screen.single_run_check,
                                    labels=tuple(np.asarray(runs.run_ids, dtype=object)[mask]))))
    for job in jobs:
        job.update(restarts=protocol.model.restarts,
                   ml_runs_per_hyperparameter=protocol.model.ml_runs_per_hyperparameter)
    return jobs, early


def _binomial_job(item, rule, runs: RunsTable, U_runs, mask, warm_start, child, k: int | None,
                  cap: float | None, cohort_size: int | None) -> dict:
    """A binomial response's fit job: a limit (``rule`` given: the prior mean at the limit's logit)
    or the objective (``rule`` None: the prior mean at the logit of the pooled rate, see
    :func:`pooled_logit`)."""
    role = "objective" if rule is None else "limit"
    if item.name not in runs.counts:
        raise ModelError(f"{role} {item.name!r} is binomial but the runs give no counts for it; give the "
                         f"columns {item.events!r} and {item.subjects!r}")
    events, subjects = runs.counts[item.name]
    prior_mean = pooled_logit(events[mask], subjects[mask]) if rule is None else rule.prior_mean
    return dict(response=item.name, role=role, U=U_runs[mask], y=runs.Y[item.name][mask],
                events=events[mask], subjects=subjects[mask], prior_mean=prior_mean,
                warm=warm_start.get(item.name), seed=_seed_of(child), k=k, length_scale_max=cap,
                cohort_size=cohort_size)


def pooled_logit(events, subjects) -> float:
    """The logit of the pooled rate with Jeffreys' half counts, log((K + 1/2) / (N - K + 1/2)):
    a binomial objective's prior mean, finite when no run (or every run) had an event."""
    K, N = float(np.sum(events)), float(np.sum(subjects))
    return float(np.log((K + 0.5) / (N - K + 0.5)))


def fit_models(protocol: Protocol, rules: ScreenRules, runs: RunsTable, U_runs, used, *, warm_start: dict,
               children, n_free: int, textbook: bool = False) -> FittedModels:
    """Fit every response's model (independent fits, on FIT_WORKERS processes when big).

    ``textbook`` fits the Gaussian limit models as the textbook does (prior
    mean at the data's mean, no signal-variance floor; the simulator's
    ``textbook`` strategy only).

    BLAS stays on one thread, so each fit gives the same bits however it runs.

    Raises
    ------
    ModelError
        When the objective has too few runs or its model cannot be fitted.
    """
    jobs, early = _jobs(protocol, rules, runs, U_runs, used, warm_start, children, n_free, textbook)
    # starting worker processes costs about 0.1 s, more than small fits take
    big = max(len(job["y"]) for job in jobs) >= PARALLEL_FIT_MIN_RUNS
    fitted = map_jobs(_fit_job, jobs, FIT_WORKERS if big else 1)
    obj_model, summary = fitted[0]
    if obj_model is None:
        raise ModelError(f"the objective model for {protocol.objective.name!r} could not be fitted: "
                         f"{summary.message}")
    summaries, limit_models = [summary], []
    by_limit = {job["k"]: out for job, out in zip(jobs[1:], fitted[1:])}
    for k in range(len(protocol.limits)):
        model, summary = (None, early[k]) if k in early else by_limit[k]
        summaries.append(summary)
        limit_models.append(model)
    return FittedModels(obj_model, limit_models, summaries)
