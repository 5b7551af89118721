"""The protocol's settings tables: [screen], [ranking], [batch], [model], [escalation],
[start] and the forbidden regions, with the base every protocol table shares.

Split from :mod:`.protocol` (which assembles and validates the whole protocol);
every name here is also importable from there.
"""

from __future__ import annotations

from functools import cached_property
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from guardband.planner.inputs.rules import LinearRule, parse_rule

__all__ = ["Forbidden", "Screen", "Ranking", "Batch", "ModelSettings", "Escalation", "StartRegion"]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _unit(text: str) -> dict:
    """The unit of a setting, carried into the JSON Schema and the protocol reference."""
    return {"x-unit": text}


class Forbidden(_Strict):
    """A region the protocol forbids: every point meeting all its rules is excluded."""

    name: str = Field(description="a name for the region, used in the exclusion table")
    rules: tuple[str, ...] = Field(
        min_length=1, description="linear rules that together describe the region (a point meeting "
        "every one is excluded), e.g. [\"dose_a >= 40\", \"dose_b >= 8\"]"
    )

    @cached_property
    def parsed(self) -> tuple[LinearRule, ...]:
        return tuple(r for text in self.rules for r in parse_rule(text))


class Screen(_Strict):
    """Safety-screen settings."""

    threshold: float = Field(gt=0, lt=1, description="the joint figure a candidate must reach",
                             json_schema_extra=_unit("probability"))
    joint: Literal["bound", "independent"] = Field(
        default="bound", description="how the limits' probabilities p_i combine into the joint figure: "
        "bound = max(0, 1 - sum(1 - p_i)), true whatever the correlation; independent = prod(p_i)"
    )
    min_runs: int = Field(default=5, ge=1, description="measured runs a limit's model needs before it is "
                          "fitted (a limit's own min_runs overrides it)", json_schema_extra=_unit("runs"))
    max_step: float | None = Field(
        default=None,
        gt=0,
        description="largest distance from the nearest run that met every limit (not set: no such rule)",
        json_schema_extra=_unit("unit-scaled distance (each free factor's reachable range scaled to 0..1) "
                                "per sqrt(number of free factors)"),
    )
    span_reach: float | None = Field(
        default=0.25,
        ge=0,
        description=(
            "a candidate must lie inside the box the runs that met every limit span (free continuous "
            "factors, unit-scaled), each side pushed out by this share of its width; None turns the "
            "rule off, from Python only (TOML has no empty value); factors with discrete levels step "
            "under max_step"
        ),
        json_schema_extra=_unit("share of the box's width"),
    )
    span_floor: float = Field(
        default=0.05,
        ge=0,
        le=1,
        description="the least push of each side of that box (unit-scaled), so a tight cluster can grow",
        json_schema_extra=_unit("unit-scaled (each factor's reachable range is 0..1)"),
    )
    span_growth: int = Field(
        default=3,
        ge=0,
        le=10,
        description=(
            "the push of that box doubles for each of the latest runs in a row, up to this many, that "
            "lay beyond the box of the runs before them and met every limit (a run that broke a limit "
            "ends the streak), so a region whose edge keeps coming back within the limits grows faster; "
            "0: never"
        ),
        json_schema_extra=_unit("doublings"),
    )
    forbidden: tuple[Forbidden, ...] = Field(
        default=(), description="regions no candidate may enter ([[screen.forbidden]] tables)"
    )
    short_model: bool = Field(
        default=True,
        description=(
            "also screen with each limit model's shortest plausible length scales (within the "
            "profile-likelihood 95% interval of one common multiplier) and take the lower probability"
        ),
    )
    widen_from_loo: bool = Field(
        default=True,
        description=(
            "widen a limit model's predictive sd when its own leave-one-out check says it is "
            "overconfident (never narrowed)"
        ),
    )
    widen_locally: bool = Field(
        default=True,
        description=(
            "widen a limit model's predictive sd near the runs it predicted too hopefully "
            "(its one-sided leave-one-out errors, weighted by closeness; never narrowed)"
        ),
    )
    single_run_check: bool = Field(
        default=True,
        description=(
            "judge each limit also with every run left out in turn and take the worst, so that "
            "no candidate passes on the strength of a single run"
        ),
    )


class Ranking(_Strict):
    """Which ranking rule orders the survivors."""

    rule: Literal["ei", "pi", "bound", "mean"] = Field(
        default="ei", description="ei: expected improvement; pi: probability of improvement; bound: the "
        "optimistic confidence bound (mean + kappa sd when maximizing, mean - kappa sd when minimizing); "
        "mean: the predicted value alone"
    )
    kappa: float = Field(default=2.0, ge=0, le=100, description="how many predictive sds the bound rule goes "
                         "past the mean, towards better", json_schema_extra=_unit("standard deviations"))
    xi: float = Field(default=0.0, ge=0, description="the least gain over the best run that the pi rule "
                      "counts as an improvement", json_schema_extra=_unit("the objective's unit"))


class Batch(_Strict):
    """Batch and search settings."""

    size: int = Field(default=4, ge=1, le=100, description="runs proposed per planning step (the batch "
                      "may come out smaller; the plan says so)", json_schema_extra=_unit("runs"))
    pool: int = Field(default=4000, ge=50, le=500_000, description="random candidates drawn from the design "
                      "space at each step", json_schema_extra=_unit("candidates"))
    refine: int = Field(default=4, ge=0, le=50, description="best survivors refined by a local search "
                        "(0: none)", json_schema_extra=_unit("candidates"))
    method: Literal["sampled", "believer", "explore"] = Field(
        default="explore",
        description=(
            "how a later pick of a batch is valued given the earlier picks, whose results are not yet "
            "known: sampled = the ei or pi value averaged over sampled results of the earlier picks "
            "(each sample's best result counts as the incumbent in that sample), so that a pick beside "
            "an earlier one keeps the value of the chance that the earlier one disappoints; believer = "
            "each earlier pick is taken to come out at its predicted mean, which also becomes the "
            "incumbent; explore = the first pick as under sampled, each later pick the candidate whose "
            "objective sd given the earlier picks is largest among those that pass the screen and could "
            "still be the best (optimistic bound, kappa of [ranking], reaching the best pessimistic "
            "bound among the screen's survivors), falling back to the sampled ranking when none is "
            "left. Every way the limits are fantasised towards the limit and every pick must pass "
            "the screen with and without the fantasies; the bound and mean rules value picks alike "
            "under sampled and believer"
        ),
    )
    search_per_run: bool = Field(
        default=True,
        description=(
            "draw pool candidates and refine refine survivors for each run the step proposes, so that "
            "a batch of 4 searches as widely as four steps of one run (at most 500,000 candidates); "
            "false: once per step, whatever the batch size"
        ),
    )
    least_worth: float = Field(
        default=0.0,
        ge=0,
        lt=1,
        description=(
            "the batch stops early, and the plan says at which pick and why, when a later pick's ei "
            "(or pi) given the earlier picks is below this share of the first pick's; 0: never. "
            "Applies to the ei and pi rules once a run has met every limit; a batch size asked for "
            "on the command line (--count) is always filled. Under method = \"explore\" a later pick "
            "made to learn is judged by the same ei, which is small by design, so a value above 0 "
            "often stops such a batch at its first pick"
        ),
        json_schema_extra=_unit("share of the first pick's value"),
    )


class ModelSettings(_Strict):
    """Gaussian-process fitting settings."""

    restarts: int = Field(default=4, ge=1, le=50, description="starts of each model's hyperparameter "
                          "search", json_schema_extra=_unit("starts"))
    ml_runs_per_hyperparameter: float = Field(
        default=12.0,
        ge=0,
        le=1e6,
        description=(
            "weak priors on the hyperparameters while a response has fewer than this many "
            "measured runs per hyperparameter (number of free factors + 2); maximum likelihood "
            "from then on"
        ),
        json_schema_extra=_unit("runs per hyperparameter"),
    )
    limit_length_scale_max: float = Field(
        default=0.4,
        gt=0.01,
        le=1000,
        description=(
            "largest length scale of a limit model, per sqrt(number of free factors) of the "
            "unit-scaled design space (the unit of max_step), so that far from the runs the "
            "model returns to the limit instead of extrapolating a flat response"
        ),
        json_schema_extra=_unit("unit-scaled distance per sqrt(number of free factors), as max_step"),
    )


class Escalation(_Strict):
    """Dose escalation as the trade does it (factors with discrete levels)."""

    no_skipping: bool = Field(
        default=True,
        description=(
            "no untried level is skipped: a candidate may lie at most one level above the highest level "
            "of each factor given in a run that met every limit, and above it in one factor only"
        ),
    )
    cohort_size: int | None = Field(
        default=None, ge=1, le=10_000,
        description="subjects in each proposed cohort (the batch's unit); a binomial limit's batch fantasies use it",
    )


class StartRegion(_Strict):
    """A region known to be safe where a campaign with no runs may start."""

    rules: tuple[str, ...] = Field(
        min_length=1, description="linear rules that describe the region, e.g. [\"dose_a <= 10\"]"
    )
    note: str = Field(default="", description="why the region is known to be safe, printed with it")

    @cached_property
    def parsed(self) -> tuple[LinearRule, ...]:
        return tuple(r for text in self.rules for r in parse_rule(text))
