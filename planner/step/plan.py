"""One planning step: models, candidate pool, safety screen, ranking, batch.

A planning step is a pure function of (protocol, runs, seed, warm start,
tool version): the same inputs give the same plan, byte for byte.

The flow (see DESIGN.md):

1. the design space from the protocol; refuse when it is empty;
2. one GP per response on the measured runs (factors scaled to the unit
   cube, fixed factors dropped); a limit model's prior mean sits at its
   limit; a limit with too few runs, or whose model cannot be fitted,
   vouches for nothing (fail closed); a limit model that its own
   leave-one-out check finds overconfident is widened
   (``screen.widen_from_loo``), and it is paired with its shortest
   plausible length scales, the screen taking the worse of the two
   (``screen.short_model``, :mod:`planner.limitmodel`); the fits run on
   worker processes when they are big (:mod:`planner.parallel`);
3. a candidate pool from the hit-and-run sampler, plus candidates between
   the runs that met every limit and pool points (convex combinations stay
   inside the polytope), plus a local refinement of the best candidates;
   when no candidate passes, a local search for the highest joint figure
   from the closest ones (its points are screened like any other);
4. the safety screen on the pool (``safety.screen``);
5. the incumbent is the best measured objective among runs that met every
   limit; with none, the step ranks by the joint figure (feasibility first)
   and says so;
6. the batch is chosen greedily: take the best survivor, condition every
   model on its fantasised results (the posterior mean, "kriging
   believer", which also updates the incumbent), re-screen and re-rank,
   repeat; two runs of one batch are never closer than MIN_SEPARATION. A candidate must pass the
   screen under the models fitted to real data *and* under the models with
   the fantasies, so fantasised data can never admit a candidate that the
   real data would exclude. Every value shown for a proposal comes from
   the models fitted to real data.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import minimize

from guardband.planner import __version__
from guardband.planner.step.acquisition import all_values, log_expected_improvement, score as rule_score
from guardband.planner.errors import ModelError, ProtocolError
from guardband.planner.models import Hyperparameters, PessimisticLimitModel, default_workers, fit_gp, map_jobs
from guardband.planner.inputs.protocol import Limit, Protocol
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.settings import FEASIBILITY_TOL, NEAR_MISS_COUNT

from guardband.safety.screen import (
    LimitPrediction,
    ScreenResult,
    joint_figure,
    limit_probability,
    run_screen,
    step_distance,
)

__all__ = ["ModelSummary", "Proposal", "PlanResult", "plan_step", "safe_runs_mask", "MIN_OBJECTIVE_RUNS"]

#: The objective model needs at least this many measured runs.
MIN_OBJECTIVE_RUNS = 3
#: Normal quantile of a two-sided 95% interval.
Z95 = 1.959963984540054
#: Share of the pool drawn between safe runs and pool points (local candidates).
LOCAL_SHARE = 0.25
#: Smallest distance between two runs of one batch (unit-scaled, per sqrt(factor)).
MIN_SEPARATION = 0.01
#: Worker processes that fit the response models side by side (1: in turn).
FIT_WORKERS = default_workers()
#: Fits run on worker processes only when some response has this many runs
#: (measured break-even of the process start-up: about 100 to 200 runs).
PARALLEL_FIT_MIN_RUNS = 150
#: When no pool candidate passes the screen, the local search for the
#: highest joint figure starts from this many of the closest candidates.
RESCUE_STARTS = 6
#: A limit model is checked by leave-one-out (and widened if overconfident)
#: from this many runs.
LOO_WIDEN_MIN_RUNS = 5
#: Forward-difference step (unit-scaled) for the refinement's gradients.
FD_STEP = 1e-6
#: Local refinement aims this far inside each probability requirement.
REFINE_MARGIN = 1e-3


@dataclass(frozen=True)
class ModelSummary:
    """What was fitted for one response, for the log and the report."""

    response: str
    role: str  # "objective" or "limit"
    n_runs: int
    status: str  # "ok", "too-few-runs", "model-not-fitted"
    message: str
    hyperparameters: dict | None = None
    log_marginal_likelihood: float | None = None
    prior_mean: float | None = None
    loo_coverage: float | None = None  # share of measured values inside their LOO 95% interval
    loo_rmse: float | None = None
    sd_factor: float | None = None  # limit models: predictive sd widened by this (leave-one-out check)
    short_factor: float | None = None  # limit models: length-scale multiplier of the short model

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Proposal:
    """One proposed run with what the models (fitted to real data) say about it."""

    rank: int
    x: np.ndarray
    origin: str  # "pool", "local" or "refined"
    mean: float
    sd: float
    lo95: float
    hi95: float
    p: dict[str, float]
    joint: float
    values: dict[str, float]  # ei, pi, bound, mean
    score: float


@dataclass(frozen=True)
class PlanResult:
    """Everything one planning step decided, and why."""

    protocol: Protocol
    factor_names: tuple[str, ...]
    seed: int
    mode: str  # "improve" or "feasibility-first"
    incumbent: dict | None
    proposals: list[Proposal]
    pool: np.ndarray
    origin: np.ndarray
    screen: ScreenResult
    scores: np.ndarray
    models: list[ModelSummary]
    messages: list[str]
    warm_start: dict
    runs_sha256: str
    n_runs_used: int
    n_pending: int
    flags: tuple[str, ...] = field(default=())
    version: str = __version__
    #: Fitted models by response name (None where a limit could not vouch), and
    #: the design space; for reports and diagnostics, not part of the record.
    fitted: dict = field(default_factory=dict, repr=False, compare=False)
    space: object = field(default=None, repr=False, compare=False)

    def unit(self, X) -> np.ndarray:
        """Protocol units -> the unit-cube coordinates the models take."""
        return _Scaler(self.space).unit(X)

    # ------------------------------------------------------------ summaries
    def counts(self) -> dict[str, int]:
        return self.screen.counts()

    def near_misses(self, count: int = NEAR_MISS_COUNT) -> list[dict]:
        """The best-ranked excluded candidates with every limit's probability."""
        excluded = np.flatnonzero(~self.screen.survives & (self.screen.reason != "outside-design-space"))
        order = excluded[np.lexsort((excluded, -self.scores[excluded]))]
        out = []
        for i in order[:count]:
            out.append(self._candidate_dict(int(i)))
        return out

    def _candidate_dict(self, i: int) -> dict:
        s = self.screen
        return {
            "candidate": i,
            "x": {n: float(v) for n, v in zip(self.factor_names, self.pool[i])},
            "origin": str(self.origin[i]),
            "reason": str(s.reason[i]),
            "detail": s.detail[i],
            "p": {n: _num(s.P[i, j]) for j, n in enumerate(s.limit_names)},
            "joint": float(s.joint[i]),
            "step": _num(s.step[i]),
            "score": _num(self.scores[i]),
        }

    def hyperparameters(self) -> dict:
        return {m.response: m.hyperparameters for m in self.models if m.hyperparameters is not None}

    def proposal_dicts(self) -> list[dict]:
        out = []
        for p in self.proposals:
            out.append(
                {
                    "rank": p.rank,
                    "x": {n: float(v) for n, v in zip(self.factor_names, p.x)},
                    "origin": p.origin,
                    "objective": {"mean": p.mean, "sd": p.sd, "lo95": p.lo95, "hi95": p.hi95},
                    "p": dict(p.p),
                    "joint": p.joint,
                    "values": dict(p.values),
                    "score": p.score,
                }
            )
        return out

    def record_body(self) -> dict:
        """The JSON-able body of this step's decision-log record."""
        return {
            "tool_version": self.version,
            "protocol_fingerprint": self.protocol.fingerprint,
            "runs_sha256": self.runs_sha256,
            "seed": self.seed,
            "mode": self.mode,
            "ranking_rule": self.protocol.ranking.rule if self.mode == "improve" else "joint",
            "threshold": self.protocol.screen.threshold,
            "joint_method": self.protocol.screen.joint,
            "incumbent": self.incumbent,
            "n_runs_used": self.n_runs_used,
            "n_pending": self.n_pending,
            "n_candidates": int(self.pool.shape[0]),
            "counts": self.counts(),
            "models": [m.to_dict() for m in self.models],
            "warm_start": self.warm_start,
            "proposals": self.proposal_dicts(),
            "near_misses": self.near_misses(),
            "messages": list(self.messages),
            "flags": list(self.flags),
        }


def _num(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None


# ---------------------------------------------------------------- helpers
def within_limit(y: np.ndarray, limit: Limit) -> np.ndarray:
    """Whether measured values meet a limit (NaN counts as not met)."""
    ok = np.isfinite(y)
    if limit.upper is not None:
        ok &= y <= limit.upper
    if limit.lower is not None:
        ok &= y >= limit.lower
    return ok


def safe_runs_mask(protocol: Protocol, runs: RunsTable) -> np.ndarray:
    """Runs whose every limited response was measured and met its limit."""
    ok = ~runs.pending
    for lim in protocol.limits:
        ok &= within_limit(runs.Y[lim.name], lim)
    return ok


def _prior_mean_for(limit: Limit) -> float:
    # The prior mean sits at the limit, so that away from the runs the model
    # gives a probability of about 1/2 at best and never claims safety. For a
    # two-sided limit the upper edge is used (the same 1/2 ceiling holds).
    return float(limit.upper if limit.upper is not None else limit.lower)


def _loo_summary(model, y) -> tuple[float, float]:
    loo = model.loo()
    sd = np.sqrt(loo.variance)
    inside = np.abs(loo.residual) <= Z95 * sd
    return float(np.mean(inside)), float(np.sqrt(np.mean(loo.residual**2)))


def _fit_job(job: dict):
    """One model fit, as :func:`_fit` with the job's fields (module level: runs in a worker)."""
    return _fit(job["response"], job["role"], job["U"], job["y"], prior_mean=job["prior_mean"],
                restarts=job["restarts"], warm=job["warm"], seed=job["seed"],
                length_scale_max=job["length_scale_max"],
                ml_runs_per_hyperparameter=job["ml_runs_per_hyperparameter"], widen=job["widen"],
                short=job["short"], noise_sd=job["noise_sd"])


def _fit(response, role, U, y, *, prior_mean, restarts, warm, seed, length_scale_max=None,
         ml_runs_per_hyperparameter=12.0, widen=False, short=None, noise_sd=None):
    try:
        model = fit_gp(
            U,
            y,
            prior_mean=prior_mean,
            n_restarts=restarts,
            warm_start=warm,
            rng=seed,
            length_scale_max=length_scale_max,
            ml_runs_per_hyperparameter=ml_runs_per_hyperparameter,
            noise_sd=noise_sd,
        )
    except ModelError as exc:
        return None, ModelSummary(response, role, int(len(y)), "model-not-fitted", str(exc), prior_mean=prior_mean)
    sd_factor = None
    used_priors = bool(model.used_priors)
    if widen and len(y) >= LOO_WIDEN_MIN_RUNS:
        model, sd_factor = _widen_from_loo(model)
    cov, rmse = _loo_summary(model, y) if len(y) >= 3 else (None, None)
    short_factor = None
    if short is not None:
        model = PessimisticLimitModel.build(model, lower=short[0], upper=short[1],
                                            with_prior=used_priors)
        short_factor = model.factor
    summary = ModelSummary(
        response=response,
        role=role,
        n_runs=int(len(y)),
        status="ok",
        message=getattr(model, "message", ""),
        hyperparameters=model.hyperparameters.to_dict(),
        log_marginal_likelihood=float(model.log_marginal_likelihood),
        prior_mean=prior_mean,
        loo_coverage=cov,
        loo_rmse=rmse,
        sd_factor=sd_factor,
        short_factor=short_factor,
    )
    return model, summary


def _widen_from_loo(model):
    """Widen an overconfident model by its own leave-one-out check.

    The standardised leave-one-out errors ``u_i = (y_i - mu_-i) / sd_-i``
    have mean square 1 under a calibrated model. When their mean square
    ``c^2`` exceeds 1 the signal and noise variances are both multiplied by
    ``c^2``: the posterior mean is unchanged and every predictive sd grows
    by ``c`` (so the leave-one-out mean square becomes 1). This is the
    cross-validation estimate of the variance parameter of Bachoc (2013,
    Computational Statistics & Data Analysis 66, 55-69; from memory), which
    is more robust than maximum likelihood when the kernel is wrong. It is
    applied only upward: a model is never made more confident than its fit.
    Returns ``(model, c)``.
    """
    loo = model.loo()
    u2 = loo.residual**2 / np.maximum(loo.variance, 1e-300)
    c2 = float(np.mean(u2))
    if not np.isfinite(c2) or c2 <= 1.0:
        return model, 1.0
    out = model.with_variances_scaled(
        c2, f"predictive sd widened by {np.sqrt(c2):.3g} (mean square of the standardised "
            f"leave-one-out errors {c2:.3g} > 1)")
    return out, float(np.sqrt(c2))


class _Scaler:
    """Map protocol units to the unit cube of the free factors and back."""

    def __init__(self, space):
        self.space = space
        self.free = np.asarray(space.free, dtype=bool)

    def unit(self, X) -> np.ndarray:
        return np.asarray(self.space.to_unit(np.atleast_2d(X)))[:, self.free]


def _forbidden_mask(protocol: Protocol, X: np.ndarray) -> tuple[np.ndarray, list[str]]:
    n = X.shape[0]
    mask = np.zeros(n, dtype=bool)
    detail = [""] * n
    for region in protocol.screen.forbidden:
        A, b, _ = protocol.rule_rows(region.parsed)
        inside = np.all(X @ A.T <= b + FEASIBILITY_TOL, axis=1)
        for i in np.flatnonzero(inside & ~mask):
            detail[i] = f"inside the forbidden region {region.name!r} ({'; '.join(region.rules)})"
        mask |= inside
    return mask, detail


# --------------------------------------------------------------- the step
def plan_step(
    protocol: Protocol,
    runs: RunsTable,
    *,
    seed: int,
    count: int | None = None,
    warm_start: dict | None = None,
    pool_size: int | None = None,
) -> PlanResult:
    """Run one planning step.

    Parameters
    ----------
    protocol : Protocol
    runs : RunsTable
        Checked runs; pending runs (nothing measured) are not used as data.
        The step rule measures from the runs that met every limit (or, when
        there is none yet, from the measured runs, and says so).
    seed : int
        Seeds the pool and the model restarts.
    count : int, optional
        Batch size; defaults to the protocol's.
    warm_start : dict, optional
        Hyperparameters by response name (from the last plan) tried first.
    pool_size : int, optional
        Overrides the protocol's pool size.

    Returns
    -------
    PlanResult
        With zero proposals when no candidate passed the screen (the caller
        decides what that means for the exit code).

    Raises
    ------
    ProtocolError
        When the design space is empty.
    ModelError
        When the objective model cannot be fitted or has too few runs.
    """
    space = protocol.design_space()
    check = space.check()
    if check.empty:
        raise ProtocolError(
            "the design space is empty; conflicting constraints: " + "; ".join(check.conflicts)
        )
    count = protocol.batch.size if count is None else int(count)
    pool_size = protocol.batch.pool if pool_size is None else int(pool_size)
    warm_start = dict(warm_start or {})
    children = np.random.SeedSequence(seed).spawn(2 + len(protocol.response_names))
    rng_pool = np.random.default_rng(children[0])
    scaler = _Scaler(space)
    messages: list[str] = []

    used = ~runs.pending
    U_runs = scaler.unit(runs.X)
    maximize = protocol.maximize

    # ---- models
    obj = protocol.objective
    m_obj = used & runs.measured(obj.name)
    n_obj = int(m_obj.sum())
    if n_obj < MIN_OBJECTIVE_RUNS:
        raise ModelError(
            f"the objective {obj.name!r} has {n_obj} measured run(s); at least "
            f"{MIN_OBJECTIVE_RUNS} are needed to plan. Make a starting design with "
            "`guardband start` and measure it first"
        )
    # The fits are independent: they run on FIT_WORKERS processes
    # (planner.parallel; BLAS stays on one thread, so each fit gives the same
    # bits however it runs).
    jobs = [dict(response=obj.name, role="objective", U=U_runs[m_obj], y=runs.Y[obj.name][m_obj],
                 prior_mean=None, warm=_warm(warm_start, obj.name), seed=_seed_of(children[2]))]
    early: dict[int, ModelSummary] = {}
    for k, lim in enumerate(protocol.limits):
        mask = used & runs.measured(lim.name)
        n_lim = int(mask.sum())
        need = protocol.min_runs_for(lim)
        prior = _prior_mean_for(lim)
        if n_lim < need:
            msg = f"{n_lim} measured run(s), the protocol requires at least {need}"
            early[k] = ModelSummary(lim.name, "limit", n_lim, "too-few-runs", msg, prior_mean=prior)
            continue
        jobs.append(dict(response=lim.name, role="limit", U=U_runs[mask], y=runs.Y[lim.name][mask],
                         prior_mean=prior, warm=_warm(warm_start, lim.name),
                         seed=_seed_of(children[3 + k]), k=k))

    # a limit model's length scales are capped so that far from the runs it
    # returns to its prior mean (the limit) rather than carry a flat response,
    # e.g. a toxicity rate of 0 in every low-dose cohort, out to doses never
    # tried (stated per sqrt(free factor), like max_step: typical distances in
    # the unit cube grow with the square root of its dimension)
    cap = protocol.model.limit_length_scale_max * np.sqrt(max(int(scaler.free.sum()), 1))
    for job in jobs:
        job.update(restarts=protocol.model.restarts,
                   length_scale_max=cap if job["role"] == "limit" else None,
                   ml_runs_per_hyperparameter=protocol.model.ml_runs_per_hyperparameter,
                   widen=job["role"] == "limit" and protocol.screen.widen_from_loo,
                   noise_sd=(protocol.limits[job["k"]] if job["role"] == "limit" else obj).measurement_sd,
                   short=((protocol.limits[job["k"]].lower, protocol.limits[job["k"]].upper)
                          if job["role"] == "limit" and protocol.screen.short_model else None))
    # starting worker processes costs about 0.1 s, more than small fits take
    big = max(len(job["y"]) for job in jobs) >= PARALLEL_FIT_MIN_RUNS
    fitted = map_jobs(_fit_job, jobs, FIT_WORKERS if big else 1)
    obj_model, summary = fitted[0]
    models: list[ModelSummary] = [summary]
    if obj_model is None:
        raise ModelError(f"the objective model for {obj.name!r} could not be fitted: {summary.message}")
    by_limit = {job["k"]: out for job, out in zip(jobs[1:], fitted[1:])}
    limit_models = []
    for k, lim in enumerate(protocol.limits):
        if k in early:
            models.append(early[k])
            limit_models.append(None)
        else:
            model, summary = by_limit[k]
            models.append(summary)
            limit_models.append(model)
    for s in models:
        if s.status == "ok" and s.loo_coverage is not None and s.loo_coverage < 0.8 and s.n_runs >= 8:
            messages.append(
                f"model check: only {100 * s.loo_coverage:.0f}% of the measured {s.response!r} values "
                "lie inside their leave-one-out 95% interval; the model may be overconfident"
            )

    # ---- incumbent
    safe = safe_runs_mask(protocol, runs)
    y_obj = runs.Y[obj.name]
    cand_inc = safe & np.isfinite(y_obj)
    if np.any(cand_inc):
        idx = np.flatnonzero(cand_inc)
        best = idx[np.argmax(y_obj[idx])] if maximize else idx[np.argmin(y_obj[idx])]
        incumbent = {"run_id": runs.run_ids[best], "value": float(y_obj[best])}
        mode = "improve"
    else:
        incumbent = None
        mode = "feasibility-first"
        messages.append(
            "no run so far meets every limit: ranking by the joint figure to find a safe, "
            "feasible region first (feasibility first)"
        )

    # ---- pool
    n_local = int(LOCAL_SHARE * pool_size) if np.any(safe) else 0
    X_pool = np.asarray(space.sample(pool_size - n_local, rng=rng_pool))
    origin = ["pool"] * X_pool.shape[0]
    if n_local:
        X_local = _local_candidates(space, runs.X[safe], X_pool, n_local, rng_pool)
        X_pool = np.vstack([X_pool, X_local])
        origin += ["local"] * X_local.shape[0]
    origin = np.array(origin, dtype=object)
    # identical candidates (common when every factor is discrete) are kept
    # once, in order of first appearance, so that each decision is listed once
    _, first = np.unique(X_pool, axis=0, return_index=True)
    keep = np.sort(first)
    X_pool, origin = X_pool[keep], origin[keep]

    step_basis = "run that met every limit"
    anchors = U_runs[safe]
    if not np.any(safe):
        anchors = U_runs[used]
        step_basis = "measured run (none has met every limit yet)"

    def predict_all(X, obj_m, lim_ms):
        U = scaler.unit(X)
        mu, sd = obj_m.predict(U)
        lims = []
        for lim, lm in zip(protocol.limits, lim_ms):
            if lm is None:
                s = next(m for m in models if m.response == lim.name)
                lims.append(LimitPrediction(lim.name, lim.probability, lim.lower, lim.upper,
                                            status=s.status, message=s.message))
            else:
                lims.append(_limit_prediction(lim, *lm.predict(U, include_noise=_with_noise(lim))))
        return U, mu, sd, lims

    hard_cache: dict = {}

    def screen_of(X, U, lims):
        # the hard rules depend only on the points: computed once per pool
        key = (id(X), X.shape[0])
        if key not in hard_cache:
            inside = np.asarray(space.contains(X))
            outside_detail = [space.describe_violation(x) if not ok else "" for x, ok in zip(X, inside)]
            forb, forb_detail = _forbidden_mask(protocol, X)
            hard_cache.clear()
            hard_cache[key] = (X, inside, outside_detail, forb, forb_detail, step_distance(U, anchors))
        _, inside, outside_detail, forb, forb_detail, step = hard_cache[key]
        return run_screen(
            inside=inside,
            outside_detail=outside_detail,
            forbidden=forb,
            forbidden_detail=forb_detail,
            step=step,
            max_step=protocol.screen.max_step,
            step_basis=step_basis,
            limits=lims,
            threshold=protocol.screen.threshold,
            joint=protocol.screen.joint,
        )

    rank_kw = dict(maximize=maximize, kappa=protocol.ranking.kappa, xi=protocol.ranking.xi)

    def scores_of(mu, sd, result: ScreenResult, inc_value):
        if mode == "feasibility-first":
            return result.joint.astype(float)
        return rule_score(protocol.ranking.rule, mu, sd, inc_value, **rank_kw)

    inc_value = incumbent["value"] if incumbent else None
    U_pool, mu, sd, lims = predict_all(X_pool, obj_model, limit_models)
    result = screen_of(X_pool, U_pool, lims)
    scores = scores_of(mu, sd, result, inc_value)

    # ---- local refinement of the best survivors; when none passed, a local
    # search for the highest joint figure from the candidates that failed
    # only on probability (the screen is not relaxed: every point found is
    # screened again in full)
    rescue = protocol.batch.refine > 0 and not np.any(result.survives)
    if protocol.batch.refine > 0 and (np.any(result.survives) or rescue):
        if rescue:
            near = np.isin(result.reason, ("limit-probability", "joint-below-threshold"))
            starts = np.flatnonzero(near)
            starts = starts[np.lexsort((starts, -result.joint[starts]))][: RESCUE_STARTS]
        else:
            survivors = np.flatnonzero(result.survives)
            starts = survivors[np.lexsort((survivors, -scores[survivors]))][: protocol.batch.refine]
        refined = _refine(
            protocol, space, scaler, X_pool, starts, obj_model, limit_models,
            inc_value, "feasibility-first" if rescue else mode, rank_kw, rescue=rescue,
        )
        if refined.shape[0]:
            Ur, mur, sdr, limsr = predict_all(refined, obj_model, limit_models)
            X_pool = np.vstack([X_pool, refined])
            origin = np.concatenate([origin, np.array(["refined"] * refined.shape[0], dtype=object)])
            U_pool, mu, sd, lims = predict_all(X_pool, obj_model, limit_models)
            result = screen_of(X_pool, U_pool, lims)
            scores = scores_of(mu, sd, result, inc_value)
        if rescue:
            found = int(np.sum(result.survives))
            messages.append(
                f"no pool candidate passed the screen; a local search for the highest joint figure "
                f"from the {len(starts)} closest candidates found {found} that pass"
            )

    # ---- greedy batch with fantasies
    base_result, base_mu, base_sd = result, mu, sd
    # all four values from the models fitted to real data (EI and PI are NaN,
    # shown empty, when there is no incumbent yet)
    values = all_values(mu, sd, inc_value, **rank_kw)
    chosen: list[int] = []
    obj_f = lim_f = None
    cur_result, cur_scores = result, scores
    fantasy_inc = inc_value
    too_close = np.zeros(X_pool.shape[0], dtype=bool)
    for k in range(count):
        ok = base_result.survives & cur_result.survives & ~too_close
        if not np.any(ok):
            if k == 0:
                messages.append("no candidate passed the safety screen; nothing is proposed")
            else:
                messages.append(
                    f"only {k} of the {count} requested runs passed the screen once the earlier "
                    "proposals' fantasised results were added"
                )
            break
        idx = np.flatnonzero(ok)
        best = int(idx[np.lexsort((idx, -cur_scores[idx]))[0]])
        chosen.append(best)
        if k + 1 == count:
            break
        u_new = U_pool[best : best + 1]
        # a batch never holds two runs closer than MIN_SEPARATION
        too_close |= step_distance(U_pool, u_new) < MIN_SEPARATION
        if obj_f is None:  # posteriors over the pool, updated by rank one per pick
            obj_f = obj_model.posterior_at(U_pool)
            lim_f = [None if lm is None else lm.posterior_at(U_pool) for lm in limit_models]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            f_mu = float(obj_f.mean_sd()[0][best])
            obj_f.condition(best, f_mu)
            # kriging believer: the fantasised result also counts for the
            # incumbent, so the next pick must improve on it
            if fantasy_inc is not None:
                fantasy_inc = max(fantasy_inc, f_mu) if maximize else min(fantasy_inc, f_mu)
            for lp in lim_f:
                if lp is not None:
                    lp.condition(best, float(lp.mean_sd()[0][best]))
            mu_f, sd_f = obj_f.mean_sd()
            lims_f = []
            for lim, lp, base in zip(protocol.limits, lim_f, lims):
                if lp is None:
                    lims_f.append(base)
                else:
                    lims_f.append(_limit_prediction(lim, *lp.mean_sd(include_noise=_with_noise(lim))))
        cur_result = screen_of(X_pool, U_pool, lims_f)
        cur_scores = scores_of(mu_f, sd_f, cur_result, fantasy_inc)

    proposals = []
    for r, i in enumerate(chosen, start=1):
        vals = {key: _num(v[i]) for key, v in values.items()}
        proposals.append(
            Proposal(
                rank=r,
                x=X_pool[i].copy(),
                origin=str(origin[i]),
                mean=float(base_mu[i]),
                sd=float(base_sd[i]),
                lo95=float(base_mu[i] - Z95 * base_sd[i]),
                hi95=float(base_mu[i] + Z95 * base_sd[i]),
                p={n: float(base_result.P[i, j]) for j, n in enumerate(base_result.limit_names)},
                joint=float(base_result.joint[i]),
                values=vals,
                score=float(scores[i]),
            )
        )
    messages = list(result.messages) + messages
    return PlanResult(
        protocol=protocol,
        factor_names=protocol.factor_names,
        seed=int(seed),
        mode=mode,
        incumbent=incumbent,
        proposals=proposals,
        pool=X_pool,
        origin=origin,
        screen=base_result,
        scores=np.asarray(scores, dtype=float),
        models=models,
        messages=messages,
        warm_start=warm_start,
        runs_sha256=runs.sha256,
        n_runs_used=int(used.sum()),
        n_pending=int(runs.pending.sum()),
        flags=runs.flags,
        fitted={obj.name: obj_model, **{lim.name: lm for lim, lm in zip(protocol.limits, limit_models)}},
        space=space,
    )


def _with_noise(lim: Limit) -> bool:
    """Whether a limit is judged on the next measurement (noise included) or the true value."""
    return lim.judged_on == "measurement"


def _limit_prediction(lim: Limit, mean, sd) -> LimitPrediction:
    return LimitPrediction(lim.name, lim.probability, lim.lower, lim.upper, mean=mean, sd=sd)


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


def _local_candidates(space, X_safe, X_pool, n, rng) -> np.ndarray:
    """Points a short way from a safe run towards a pool point.

    A convex combination of two points of a convex polytope stays inside it;
    discrete factors keep the safe run's level, and any point that is not
    inside the design space (e.g. a safe run that was itself outside its
    bounds) is dropped.
    """
    a = X_safe[rng.integers(0, X_safe.shape[0], size=n)]
    b = X_pool[rng.integers(0, X_pool.shape[0], size=n)]
    t = rng.uniform(0.0, 0.3, size=(n, 1))
    X = a + t * (b - a)
    for j in space.levels:
        X[:, j] = a[:, j]
    keep = np.asarray(space.contains(X))
    return X[keep]


def _refine(protocol, space, scaler, X_pool, top, obj_model, limit_models,
            inc_value, mode, rank_kw, *, rescue: bool = False) -> np.ndarray:
    """Refine the pool candidates ``top`` locally with SLSQP.

    With ``rescue`` (no candidate passed the screen) the search maximises the
    joint figure within the design space alone, and keeps any point that
    raised it; the caller screens every point in full.

    Variables are the free continuous factors (discrete levels are kept),
    the design space's linear constraints are kept exactly, and the screen
    enters as constraints p_i(x) >= probability_i and joint(x) >= threshold.
    Each refined point is screened again in full before it can be chosen.
    """
    free = scaler.free.copy()
    for j in space.levels:
        free[j] = False
    cont = np.flatnonzero(free)
    if cont.size == 0:
        return np.zeros((0, X_pool.shape[1]))
    lo = space.lower[cont]
    span = np.where(space.upper[cont] - lo > 0, space.upper[cont] - lo, 1.0)
    limits = protocol.limits

    def full(x0, u):
        x = x0.copy()
        x[cont] = lo + span * u
        return x

    req = np.array([lim.probability for lim in limits]) + REFINE_MARGIN
    thr = protocol.screen.threshold + REFINE_MARGIN

    def values_at(X):
        """Score (to maximise) and screen slack (>= 0 where it passes) at rows X."""
        U = scaler.unit(X)
        P = [limit_probability(*lm.predict(U, include_noise=_with_noise(lim)), lower=lim.lower, upper=lim.upper)
             for lim, lm in zip(limits, limit_models)]
        P = np.column_stack(P) if P else np.ones((U.shape[0], 0))
        J = joint_figure(P, method=protocol.screen.joint)
        if mode == "feasibility-first":
            score = J
        else:
            mu, sd = obj_model.predict(U)
            if protocol.ranking.rule == "ei":
                score = log_expected_improvement(mu, sd, inc_value, maximize=rank_kw["maximize"])
            else:
                score = rule_score(protocol.ranking.rule, mu, sd, inc_value, **rank_kw)
        # aim a little inside the screen (REFINE_MARGIN) so that the refined
        # point still passes it after rounding
        slack = np.column_stack([P - req, J - thr])
        return np.maximum(score, -1e300), slack

    def make_problem(x0):
        """Objective and constraints with forward-difference gradients, all
        points of one gradient predicted in a single batched call."""
        k = cont.size
        last = {}

        def at(u):
            key = u.tobytes()
            if last.get("key") != key:
                Uv = np.vstack([u, u + FD_STEP * np.eye(k)])
                X = np.repeat(x0[None, :], k + 1, axis=0)
                X[:, cont] = lo + span * Uv
                last["key"], last["val"] = key, values_at(X)
            return last["val"]

        fun = lambda u: -float(at(u)[0][0])
        jac = lambda u: -(at(u)[0][1:] - at(u)[0][0]) / FD_STEP
        cfun = lambda u: at(u)[1][0]
        cjac = lambda u: ((at(u)[1][1:] - at(u)[1][0]) / FD_STEP).T
        return fun, jac, cfun, cjac

    if any(lm is None for lm in limit_models):
        return np.zeros((0, X_pool.shape[1]))
    out = []
    for i in top:
        x0 = X_pool[i].copy()
        # linear constraints in the variables u: A x <= b with x = x0 (others) + lo + span*u
        rest = x0.copy()
        rest[cont] = lo
        cons = []
        if space.A_ub.shape[0]:
            A = space.A_ub[:, cont] * span
            b = space.b_ub - space.A_ub @ rest
            cons.append({"type": "ineq", "fun": lambda u, A=A, b=b: b - A @ u, "jac": lambda u, A=A: -A})
        if space.A_eq.shape[0]:
            A = space.A_eq[:, cont] * span
            b = space.b_eq - space.A_eq @ rest
            cons.append({"type": "eq", "fun": lambda u, A=A, b=b: A @ u - b, "jac": lambda u, A=A: A})
        fun, jac, cfun, cjac = make_problem(x0)
        if not rescue:
            cons.append({"type": "ineq", "fun": cfun, "jac": cjac})
        u0 = (x0[cont] - lo) / span
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = minimize(
                    fun, u0, jac=jac, method="SLSQP",
                    bounds=[(0.0, 1.0)] * cont.size, constraints=cons,
                    options={"maxiter": 60, "ftol": 1e-7},
                )
        except (ValueError, np.linalg.LinAlgError, ModelError):
            continue
        if (not res.success and not rescue) or res.fun >= fun(u0):
            continue  # keep only refinements that converged (rescue: any) and improved the score
        x = full(x0, np.clip(res.x, 0.0, 1.0))
        if np.all(np.isfinite(x)) and bool(np.asarray(space.contains(x[None, :]))[0]):
            out.append(x)
    return np.array(out).reshape(-1, X_pool.shape[1])
