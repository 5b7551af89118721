"""The study protocol: a TOML file validated once, at the edge.

A protocol declares the study, its factors (continuous settings, mixture
components, discrete levels), linear rules over the factors, the objective,
the limited responses with the probability each limit must hold with, and
the screening, ranking, batch and model settings. Everything inside the
planner trusts a :class:`Protocol` once it exists.

A bad protocol raises :class:`planner.errors.ProtocolError` with the file
name, the field path (``factors[2].upper``) and a plain sentence.
"""

from __future__ import annotations

import hashlib
import json
import math
from functools import cached_property
from pathlib import Path
from typing import Annotated, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from guardband.planner import settings
from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.names import check_visible, name_key, normal_text, shown
from guardband.planner.inputs.reading import read_toml
from guardband.planner.inputs.hints import choice_hint, percent_total_hint, unknown_key_hint
from guardband.planner.inputs.rulechecks import check_rules
from guardband.planner.inputs.rules import LinearRule, parse_rule
from guardband.planner.inputs.protocol_tables import (  # noqa: F401 - re-exported
    Batch,
    Escalation,
    Forbidden,
    ModelSettings,
    Ranking,
    Screen,
    StartRegion,
    _Strict,
    _unit,
)

__all__ = [
    "Protocol",
    "Study",
    "Factor",
    "Mixture",
    "Rule",
    "Objective",
    "Limit",
    "Screen",
    "Forbidden",
    "Ranking",
    "Batch",
    "ModelSettings",
    "StartRegion",
    "Escalation",
    "load_protocol",
    "parse_protocol",
    "RANKING_RULES",
]

RANKING_RULES = ("ei", "pi", "bound", "mean")
_SPACES: dict = {}  # fingerprint -> DesignSpace (see Protocol.design_space)




def _check_name(value: str, what: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"{what} must be a non-empty text")
    if value != value.strip():
        raise ValueError(f"{what} {value!r} has leading or trailing spaces; remove them")
    check_visible(value, what)
    if "`" in value:
        raise ValueError(f"{what} {value!r} contains a backquote")
    return value


class Study(_Strict):
    """Who wrote the protocol, and what kind of study it is."""

    title: str = Field(min_length=1, description="the study's title, printed on every output")
    version: str = Field(min_length=1, description="the protocol's own version, as text (e.g. \"1.0\")")
    author: str = Field(min_length=1, description="who wrote the protocol")
    kind: Literal["formulation", "dose"] = Field(
        default="formulation", description="the kind of study; it chooses the cautions every output carries"
    )
    description: str = Field(default="", description="free text about the study")


class Factor(_Strict):
    """One factor: a continuous setting, a mixture component or a discrete factor.

    A component or continuous factor with ``lower == upper`` is fixed (for
    example an active ingredient at a fixed fraction).
    """

    name: str = Field(
        description="the factor's name, as in the runs file's header and in rules (quote a name "
        "with spaces in a rule with backquotes: `name with spaces`)"
    )
    kind: Literal["continuous", "component", "discrete"] = Field(
        description="continuous: any value between lower and upper; component: a mixture component "
        "(the components add up to [mixture] total); discrete: one of `levels`"
    )
    lower: float | None = Field(
        default=None, description="lowest value (continuous and component factors)",
        json_schema_extra=_unit("the factor's unit"),
    )
    upper: float | None = Field(
        default=None, description="highest value (continuous and component factors); equal to lower "
        "fixes the factor", json_schema_extra=_unit("the factor's unit"),
    )
    levels: tuple[float, ...] | None = Field(
        default=None, description="the values a discrete factor can take (e.g. the dose strengths that "
        "exist), in increasing order", json_schema_extra=_unit("the factor's unit"),
    )
    unit: str = Field(
        default="", description="the factor's unit (e.g. \"kN\", \"mg/kg\", \"fraction\"); a runs file "
        "may give another unit of the same kind in its header, which is converted",
    )
    resolution: float | None = Field(
        default=None, gt=0, allow_inf_nan=False,
        description="the smallest step the lab can set or weigh (0.001 of a fraction, 0.5 kN); proposals "
        "are rounded to its multiples and screened again; not for discrete factors",
        json_schema_extra=_unit("the factor's unit"),
    )

    @model_validator(mode="after")
    def _check(self):
        _check_name(self.name, "factor name")
        if self.kind == "discrete" and self.resolution is not None:
            raise ValueError(f"discrete factor {self.name!r} takes `levels`, not `resolution`")
        if self.kind == "discrete":
            if self.levels is None or len(self.levels) == 0:
                raise ValueError(
                    f"discrete factor {self.name!r} needs `levels`, e.g. levels = [5, 10, 20]"
                )
            if self.lower is not None or self.upper is not None:
                raise ValueError(
                    f"discrete factor {self.name!r} takes `levels` only, not lower/upper"
                )
            if any(not math.isfinite(v) for v in self.levels):
                raise ValueError(f"levels of {self.name!r} must be finite numbers")
            if len(set(self.levels)) != len(self.levels):
                raise ValueError(f"levels of {self.name!r} repeat a value: {list(self.levels)}")
            if list(self.levels) != sorted(self.levels):
                raise ValueError(
                    f"levels of {self.name!r} must be in increasing order: {list(self.levels)}"
                )
        else:
            if self.levels is not None:
                raise ValueError(
                    f"{self.kind} factor {self.name!r} takes lower/upper, not `levels` "
                    "(use kind = \"discrete\" for a factor with fixed levels)"
                )
            if self.lower is None or self.upper is None:
                raise ValueError(f"{self.kind} factor {self.name!r} needs both `lower` and `upper`")
            if not (math.isfinite(self.lower) and math.isfinite(self.upper)):
                raise ValueError(f"bounds of {self.name!r} must be finite numbers")
            if self.lower > self.upper:
                raise ValueError(
                    f"bounds of {self.name!r} are reversed: lower = {self.lower:g} is above "
                    f"upper = {self.upper:g}; swap them"
                )
            if self.kind == "component" and self.lower < 0:
                raise ValueError(
                    f"component {self.name!r} has a negative lower bound ({self.lower:g}); "
                    "mixture fractions cannot be negative"
                )
            r = self.resolution
            if r is not None and self.lower < self.upper and (
                    math.ceil(self.lower / r - 1e-9) > math.floor(self.upper / r + 1e-9)):
                raise ValueError(f"factor {self.name!r}: no multiple of its resolution {r:g} lies between "
                                 f"{self.lower:g} and {self.upper:g}")
        return self

    @property
    def low(self) -> float:
        return float(self.levels[0]) if self.kind == "discrete" else float(self.lower)

    @property
    def high(self) -> float:
        return float(self.levels[-1]) if self.kind == "discrete" else float(self.upper)


def _check_mixture_resolution(components, total: float) -> None:
    """The free components state one common resolution or none, and can meet the total on its grid."""
    free = [f for f in components if f.lower < f.upper]
    stated = {f.resolution for f in free if f.resolution is not None}
    if not stated:
        return
    if len(stated) > 1 or any(f.resolution is None for f in free):
        raise ValueError(
            "mixture: the components that can vary (" + ", ".join(f.name for f in free) + ") must all "
            "state the same `resolution`, or none (the total is restored on one grid)")
    r = stated.pop()
    share = (total - sum(f.lower for f in components if f.lower == f.upper)) / r
    if abs(share - round(share)) > 1e-6:
        raise ValueError(f"mixture: what the varying components share ({share * r:g}) is not a multiple of "
                         f"their resolution {r:g}")
    lows = sum(math.ceil(f.lower / r - 1e-9) for f in free)
    highs = sum(math.floor(f.upper / r + 1e-9) for f in free)
    if not lows <= round(share) <= highs:
        raise ValueError(f"mixture: on the grid of resolution {r:g} the varying components cannot add up "
                         "to the total within their bounds")


class Mixture(_Strict):
    """The total that the component factors add up to."""

    total: float = Field(
        default=1.0, gt=0,
        description="what the components add up to: 1 for fractions, 100 for percentages",
        json_schema_extra=_unit("the components' unit"),
    )
    tolerance: float = Field(
        default=2e-3, gt=0, description="how far a measured run's components may miss the total",
        json_schema_extra=_unit("the components' unit"),
    )


class Rule(_Strict):
    """A named linear rule over factor names, e.g. ``mcc >= 2 * lactose``."""

    name: str = Field(default="", description="a name for the rule, used in messages")
    rule: str = Field(
        description="a linear rule over factor names, e.g. \"mcc >= 2 * lactose\", \"a / b <= 3\" or "
        "\"0.02 <= x + y <= 0.04\"; quote a name with spaces in backquotes"
    )

    @cached_property
    def parsed(self) -> tuple[LinearRule, ...]:
        return parse_rule(self.rule)


#: Known repeatability of a response's measurement (objective and limits alike).
MeasurementSd = Annotated[float | None, Field(
    ge=0,
    json_schema_extra=_unit("the response's unit"),
    description=(
        "known repeatability of the measurement (sd, in the response's unit), e.g. from "
        "method validation; fixes the model's noise instead of estimating it"
    ),
)]


def _check_count_columns(name: str, events, subjects, what: str) -> None:
    """A binomial response names its two runs-file count columns, all three names different."""
    if events is None or subjects is None:
        raise ValueError(f"{what} {name!r} needs `events` and `subjects`: the names of the "
                         "runs-file columns with the number of events and the number of subjects")
    _check_name(events, "events column")
    _check_name(subjects, "subjects column")
    if len({name, events, subjects}) < 3:
        raise ValueError(f"{what} {name!r}: the response, its events column and its subjects "
                         "column need three different names")


class Objective(_Strict):
    """The performance response to improve.

    ``kind = "binomial"``: the response is a rate of events among subjects
    (for example responders among the subjects of a cohort). The runs file
    then gives the two count columns ``events`` and ``subjects`` names
    instead of the rate; the model is a GP on the logit of the rate
    (binomial likelihood), and every rule and figure is on the rate, in [0, 1].
    """

    name: str = Field(description="the response's name, as in the runs file's header")
    direction: Literal["maximize", "minimize"] = Field(
        description="whether a larger (maximize) or a smaller (minimize) value is better"
    )
    kind: Literal["continuous", "binomial"] = Field(
        default="continuous", description="continuous: a measured value; binomial: a rate given as a "
        "count of events among subjects (columns `events` and `subjects`), modelled on the logit scale")
    events: str | None = Field(default=None, description="binomial: runs-file column with the number of events")
    subjects: str | None = Field(default=None, description="binomial: runs-file column with the number of subjects")
    unit: str = Field(default="", description="the response's unit, shown in tables and figures")
    measurement_sd: MeasurementSd = None

    @model_validator(mode="after")
    def _check(self):
        _check_name(self.name, "objective name")
        if self.kind == "binomial":
            _check_count_columns(self.name, self.events, self.subjects, "binomial objective")
            if self.measurement_sd is not None:
                raise ValueError(f"binomial objective {self.name!r}: `measurement_sd` does not apply (the "
                                 "counts carry their own uncertainty); remove it")
        elif self.events is not None or self.subjects is not None:
            raise ValueError(f"objective {self.name!r}: `events` and `subjects` belong to a "
                             "kind = \"binomial\" objective")
        return self

    @property
    def columns(self) -> tuple[str, ...]:
        """The runs-file columns of this response: its name, or its events and subjects."""
        return (self.events, self.subjects) if self.kind == "binomial" else (self.name,)


class Limit(_Strict):
    """A limited response: it must stay within [lower, upper] with ``probability``.

    ``kind = "binomial"``: the response is a rate of events among subjects
    (for example dose-limiting toxicities in a cohort). The runs file then
    gives two columns, ``events`` and ``subjects`` (their names), instead of
    the rate; the limit is on the true rate (``judged_on = "true-value"``).
    ``monotone``: the rate never falls as any dose rises (see
    :meth:`Protocol.monotone_for`; on by default for binomial upper limits in
    a dose study).
    """

    name: str = Field(description="the limited response's name, as in the runs file's header")
    kind: Literal["continuous", "binomial"] = Field(
        default="continuous", description="continuous: a measured value; binomial: a rate given as a "
        "count of events among subjects (columns `events` and `subjects`), modelled on the logit scale")
    events: str | None = Field(default=None, description="binomial: runs-file column with the number of events")
    subjects: str | None = Field(default=None, description="binomial: runs-file column with the number of subjects")
    broken_after: int | None = Field(
        default=None, ge=1,
        description=(
            "monotone binomial limits: a dose counts as having broken the limit (and excludes every dose "
            "at or above it) only once this many subjects were treated there; default 1, any cohort "
            "(the 3+3 design judges a level on six)"
        ),
    )
    monotone: bool | None = Field(
        default=None,
        description=(
            "binomial upper limits: the rate never falls as the dose of any factor rises, so a "
            "candidate is never judged safer than a run or candidate at lower or equal doses; "
            "default on in a dose study"
        ),
    )
    unit: str = Field(default="", description="the response's unit, shown in tables and figures")
    lower: float | None = Field(
        default=None, description="the least value allowed (give lower, upper or both)",
        json_schema_extra=_unit("the response's unit"),
    )
    upper: float | None = Field(
        default=None, description="the largest value allowed (give lower, upper or both)",
        json_schema_extra=_unit("the response's unit"),
    )
    probability: float = Field(
        gt=0, lt=1, description="the probability with which a proposed run must meet this limit",
        json_schema_extra=_unit("probability"),
    )
    min_runs: int | None = Field(
        default=None, ge=1, description="measured runs this limit's model needs before it is fitted "
        "(default: [screen] min_runs); until then no candidate passes this limit",
        json_schema_extra=_unit("runs"),
    )
    source: str = Field(default="", description="where the limit comes from (regulation, monograph, "
                        "quality unit), printed with it")
    judged_on: Literal["measurement", "true-value"] = Field(
        default="measurement",
        description=(
            "measurement: the probability that the next measured value meets the limit (model "
            "and measurement noise); true-value: the probability that the response itself (the "
            "noise-free mean) meets it, as overdose control in dose escalation does"
        ),
    )
    measurement_sd: MeasurementSd = None

    @model_validator(mode="before")
    @classmethod
    def _binomial_on_true_rate(cls, data):
        if isinstance(data, dict) and data.get("kind") == "binomial" and "judged_on" not in data:
            data = {**data, "judged_on": "true-value"}
        return data

    @model_validator(mode="after")
    def _check(self):
        _check_name(self.name, "limit name")
        if self.kind == "binomial":
            self._check_binomial()
        elif (self.events is not None or self.subjects is not None or self.monotone is not None
              or self.broken_after is not None):
            raise ValueError(f"limit {self.name!r}: `events`, `subjects`, `monotone` and `broken_after` belong to "
                             "kind = \"binomial\" limits")
        if self.lower is None and self.upper is None:
            raise ValueError(f"limit {self.name!r} needs `upper`, `lower` or both")
        for side in ("lower", "upper"):
            v = getattr(self, side)
            if v is not None and not math.isfinite(v):
                raise ValueError(f"{side} of limit {self.name!r} must be a finite number")
        if self.lower is not None and self.upper is not None and self.lower >= self.upper:
            raise ValueError(
                f"limit {self.name!r} is reversed or empty: lower = {self.lower:g}, "
                f"upper = {self.upper:g}"
            )
        return self

    def _check_binomial(self) -> None:
        name = self.name
        _check_count_columns(name, self.events, self.subjects, "binomial limit")
        for side in ("lower", "upper"):
            v = getattr(self, side)
            if v is not None and not 0 < v < 1:
                raise ValueError(f"{side} of binomial limit {name!r} is a rate and must lie strictly "
                                 f"between 0 and 1 (got {v:g})")
        if self.judged_on != "true-value":
            raise ValueError(f"binomial limit {name!r} is judged on the true rate; remove `judged_on` "
                             "or set it to \"true-value\"")
        if self.measurement_sd is not None:
            raise ValueError(f"binomial limit {name!r}: `measurement_sd` does not apply (the counts "
                             "carry their own uncertainty); remove it")
        if self.monotone and (self.upper is None or self.lower is not None):
            raise ValueError(f"binomial limit {name!r}: `monotone` needs an upper limit only "
                             "(a rate that must not rise above a value)")

    @property
    def columns(self) -> tuple[str, ...]:
        """The runs-file columns of this response: its name, or its events and subjects."""
        return (self.events, self.subjects) if self.kind == "binomial" else (self.name,)

    @property
    def sides(self) -> str:
        if self.lower is not None and self.upper is not None:
            return "two-sided"
        return "upper" if self.upper is not None else "lower"

    def describe(self) -> str:
        unit = f" {self.unit}" if self.unit else ""
        if self.sides == "two-sided":
            text = f"{self.lower:g} <= {self.name} <= {self.upper:g}{unit}"
        elif self.sides == "upper":
            text = f"{self.name} <= {self.upper:g}{unit}"
        else:
            text = f"{self.name} >= {self.lower:g}{unit}"
        if self.kind == "binomial":
            text += f" (the true rate of {self.events} among {self.subjects})"
        return text


#: Limit fields added after protocols were first fingerprinted, with their defaults.
_LIMIT_LATER_DEFAULTS = {"kind": "continuous", "events": None, "subjects": None, "monotone": None,
                         "broken_after": None}


class Protocol(_Strict):
    """A validated study protocol."""

    study: Study = Field(description="the [study] table")
    factors: tuple[Factor, ...] = Field(min_length=1, description="the [[factors]] tables, one per factor")
    mixture: Mixture | None = Field(default=None, description="the [mixture] table; needed when a factor "
                                    "is a component")
    constraints: tuple[Rule, ...] = Field(default=(), description="the [[constraints]] tables: linear rules "
                                          "the design space must meet")
    objective: Objective = Field(description="the [objective] table")
    limits: tuple[Limit, ...] = Field(default=(), description="the [[limits]] tables, one per limited response")
    screen: Screen = Field(description="the [screen] table")
    ranking: Ranking = Field(default=Ranking(), description="the [ranking] table")
    batch: Batch = Field(default=Batch(), description="the [batch] table")
    model: ModelSettings = Field(default=ModelSettings(), description="the [model] table")
    start: StartRegion | None = Field(default=None, description="the [start] table: where a campaign "
                                      "with no runs may start")
    escalation: Escalation | None = Field(default=None, description="the [escalation] table: dose "
                                          "escalation rules (no skipping of untried levels, cohort size)")
    seed: int | None = Field(default=None, ge=0, lt=2**63, description="random seed of every step, a "
                             "top-level key written before the first table (not set: `plan` draws one and records "
                             "it, `start` uses 0)")

    @model_validator(mode="after")
    def _cross_checks(self):
        names = [f.name for f in self.factors]
        seen: dict[str, str] = {}
        for n in names:
            if name_key(n) in seen:
                raise ValueError(_twice(f"factor name {n!r} is used twice", n, seen[name_key(n)]))
            seen[name_key(n)] = n
        roles: dict[str, str] = {}  # a response name or count column -> what names it
        for r, role in self.response_roles():
            if name_key(r) in seen:
                first = seen[name_key(r)]
                if name_key(r) not in roles:
                    raise ValueError(_twice(f"name {r!r} is used for a factor and a response ({role})", r, first))
                hint = ("; each binomial response needs its own two count columns (when two count among "
                        "the same subjects, give that number in a column of each)") if "column" in role else ""
                raise ValueError(_twice(f"name {r!r} is used twice: as {roles[name_key(r)]} and as {role}{hint}",
                                        r, first))
            seen[name_key(r)] = r
            roles[name_key(r)] = role
        if any(name_key(n) in seen for n in ("run_id", "notes", "cautions")):
            raise ValueError("`run_id`, `notes` and `cautions` are reserved column names; rename that factor "
                             "or response")
        components = [f for f in self.factors if f.kind == "component"]
        if components and self.mixture is None:
            raise ValueError(
                "factors of kind 'component' need a [mixture] table with the `total` they add up to "
                "(total = 1 for fractions, total = 100 for percentages)"
            )
        if self.escalation is not None and self.escalation.no_skipping and not any(
                f.kind == "discrete" for f in self.factors):
            raise ValueError("escalation.no_skipping needs factors of kind \"discrete\" (dose levels)")
        if self.mixture is not None and not components:
            raise ValueError("a [mixture] table was given but no factor has kind = \"component\"")
        if components:
            total = self.mixture.total
            low = sum(f.lower for f in components)
            high = sum(f.upper for f in components)
            if low > total + 1e-12:
                raise ValueError(
                    f"mixture: the component lower bounds add up to {low:g}, more than the total "
                    f"{total:g}; lower some bounds{percent_total_hint(low, high, total)}"
                )
            if high < total - 1e-12:
                raise ValueError(
                    f"mixture: the component upper bounds add up to {high:g}, less than the total "
                    f"{total:g}; raise some bounds{percent_total_hint(low, high, total)}"
                )
            _check_mixture_resolution(components, total)
        return self

    # ----------------------------------------------------------------- names
    @property
    def factor_names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.factors)

    @property
    def limit_names(self) -> tuple[str, ...]:
        return tuple(lim.name for lim in self.limits)

    @property
    def response_names(self) -> tuple[str, ...]:
        return (self.objective.name,) + self.limit_names

    @property
    def runs_columns(self) -> tuple[str, ...]:
        """The response columns of a runs file: the objective, then each limit's column(s)."""
        return self.objective.columns + tuple(c for lim in self.limits for c in lim.columns)

    def response_roles(self):
        """(name, what names it) of every response and binomial count column, the objective first."""
        for item, what in ((self.objective, "the objective"), *((lim, "the limit") for lim in self.limits)):
            yield item.name, f"{what} {item.name!r}"
            if item.kind == "binomial":
                yield item.events, f"the events column of {what} {item.name!r}"
                yield item.subjects, f"the subjects column of {what} {item.name!r}"

    @property
    def binomial_responses(self) -> tuple:
        """The objective and limits of kind "binomial" (rates given as counts), in that order."""
        return tuple(item for item in (self.objective, *self.limits) if item.kind == "binomial")

    def monotone_for(self, limit: Limit) -> bool:
        """Whether the screen holds ``limit``'s rate monotone in the doses.

        As written, or by default on for a binomial upper limit in a dose study.
        """
        if limit.monotone is not None:
            return bool(limit.monotone)
        return (self.study.kind == "dose" and limit.kind == "binomial" and limit.upper is not None
                and limit.lower is None)

    @property
    def maximize(self) -> bool:
        return self.objective.direction == "maximize"

    def min_runs_for(self, limit: Limit) -> int:
        return limit.min_runs if limit.min_runs is not None else self.screen.min_runs

    # ----------------------------------------------------------- fingerprint
    def canonical(self) -> bytes:
        """Canonical JSON of the validated protocol (sorted keys, no NaN).

        A limit's and the objective's binomial fields are left out while at their defaults, and a
        factor without a ``resolution`` is written without the key, so a
        protocol written before they existed keeps its fingerprint (and its
        recorded decision logs replay).
        """
        data = self.model_dump(mode="json")
        if data.get("escalation") is None:
            data.pop("escalation", None)
        for lim in data["limits"]:
            for key, default in _LIMIT_LATER_DEFAULTS.items():
                if lim.get(key, default) == default:
                    lim.pop(key, None)
        for key in ("kind", "events", "subjects"):
            if data["objective"].get(key) == _LIMIT_LATER_DEFAULTS[key]:
                data["objective"].pop(key, None)
        for f in data.get("factors", []):
            if f.get("resolution") is None:
                f.pop("resolution", None)
        return json.dumps(
            data, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
        ).encode("utf-8")

    @property
    def fingerprint(self) -> str:
        """SHA-256 of :meth:`canonical`; equal protocols share it whatever their layout."""
        return hashlib.sha256(self.canonical()).hexdigest()

    # ---------------------------------------------------------- design space
    def rule_rows(self, rules, *, label_prefix: str = "") -> tuple[np.ndarray, np.ndarray, list[str]]:
        """Rows ``A x <= b`` over the factors for parsed rules."""
        names = self.factor_names
        rows, rhs, labels = [], [], []
        for rule in rules:
            for a, b in rule.upper_rows(names):
                rows.append(a)
                rhs.append(b)
                labels.append(f"{label_prefix}{rule.text!r} ({rule.describe()})")
        d = len(names)
        return (
            np.asarray(rows, dtype=float).reshape(-1, d),
            np.asarray(rhs, dtype=float).reshape(-1),
            labels,
        )

    def design_space(self):
        """The :class:`planner.space.DesignSpace` this protocol describes.

        Built once per protocol content (keyed by fingerprint) and shared:
        a DesignSpace is immutable and caches its LP results.
        """
        key = self.fingerprint
        space = _SPACES.get(key)
        if space is None:
            space = self._build_design_space()
            if len(_SPACES) >= 64:
                _SPACES.pop(next(iter(_SPACES)))
            _SPACES[key] = space
        return space

    def _build_design_space(self):
        from guardband.planner.space import DesignSpace

        names = self.factor_names
        d = len(names)
        lower = np.array([f.low for f in self.factors])
        upper = np.array([f.high for f in self.factors])
        A_eq = np.zeros((0, d))
        b_eq = np.zeros(0)
        eq_labels: list[str] = []
        if self.mixture is not None:
            row = np.array([1.0 if f.kind == "component" else 0.0 for f in self.factors])
            A_eq = row[None, :]
            b_eq = np.array([self.mixture.total])
            eq_labels = [f"mixture total (components add up to {self.mixture.total:g})"]
        A_ub, b_ub, ub_labels = [], [], []
        for k, c in enumerate(self.constraints):
            label = c.name or f"constraints[{k}]"
            A, b, labels = self.rule_rows(c.parsed, label_prefix=f"constraint {label}: ")
            A_ub.append(A)
            b_ub.append(b)
            ub_labels += labels
        levels = {
            i: np.asarray(f.levels, dtype=float)
            for i, f in enumerate(self.factors)
            if f.kind == "discrete"
        }
        return DesignSpace(
            names=names,
            lower=lower,
            upper=upper,
            A_eq=A_eq,
            b_eq=b_eq,
            A_ub=np.vstack(A_ub) if A_ub else np.zeros((0, d)),
            b_ub=np.concatenate(b_ub) if b_ub else np.zeros(0),
            eq_labels=tuple(eq_labels),
            ub_labels=tuple(ub_labels),
            levels=levels,
            units=tuple(f.unit for f in self.factors),
        )

    def start_rows(self) -> tuple[np.ndarray, np.ndarray, list[str]] | None:
        """The starting region as rows ``A x <= b``, or None when none is declared."""
        if self.start is None:
            return None
        return self.rule_rows(self.start.parsed, label_prefix="start region: ")


def _twice(message: str, name: str, first: str) -> str:
    if name == first:
        return message
    return (f"{message}: {first!r} and {name!r} print alike or differ only in case or in "
            "compatibility forms; give them clearly different names")


# ----------------------------------------------------------------- loading
def _checked_data(data, source: str, loc: tuple = ()):
    """The parsed TOML with every text in NFC; ProtocolError for a number out of range or deep nesting.

    Every number must be finite and at most ``settings.MAX_INPUT_MAGNITUDE``
    in size, and tables and arrays may nest at most
    ``settings.MAX_PROTOCOL_NESTING`` deep; the refusal names the field.
    """
    if len(loc) > settings.MAX_PROTOCOL_NESTING:
        raise ProtocolError(f"{source}: {_format_loc(loc[:settings.MAX_PROTOCOL_NESTING])}: tables or arrays "
                            f"nest deeper than {settings.MAX_PROTOCOL_NESTING} levels; no protocol needs that")
    if isinstance(data, dict):
        return {normal_text(k): _checked_data(v, source, loc + (shown(normal_text(k)),)) for k, v in data.items()}
    if isinstance(data, list):
        return [_checked_data(v, source, loc + (k,)) for k, v in enumerate(data)]
    if isinstance(data, str):
        return normal_text(data)
    if isinstance(data, (int, float)) and not isinstance(data, bool):
        if isinstance(data, float) and not math.isfinite(data):
            raise ProtocolError(f"{source}: {_format_loc(loc)}: {data!r} is not a finite number")
        if abs(data) > settings.MAX_INPUT_MAGNITUDE:
            raise ProtocolError(
                f"{source}: {_format_loc(loc)}: {data:.3g} is larger in size than the "
                f"{settings.MAX_INPUT_MAGNITUDE:.0e} the tool computes with safely; state it in another unit"
            )
    return data


def _format_loc(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


def _plain(err: dict, root: type[BaseModel] | None = None, reference: str = "docs/protocol-reference.md") -> str:
    """A pydantic error of a file read by the model ``root`` (default: the protocol) in plain words;
    an unknown key is hinted from ``root``'s keys, else pointed to ``reference``."""
    kind = err.get("type", "")
    msg = err.get("msg", "")
    if kind == "extra_forbidden":
        hint = unknown_key_hint(root or Protocol, tuple(err.get("loc", ())))
        return "unknown key; " + (hint or f"check its spelling (see {reference})")
    if kind == "missing":
        return "this field is required"
    if kind == "literal_error":
        return msg + choice_hint(Protocol, tuple(err.get("loc", ())), err.get("input"))
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, ") :]
    inp = err.get("input")
    if kind in ("greater_than", "less_than", "greater_than_equal", "less_than_equal") and inp is not None:
        msg = f"{msg} (got {inp!r})"
    return msg


def parse_protocol(data: dict, *, source: str = "protocol") -> Protocol:
    """Validate a protocol given as a dict (already parsed TOML).

    Raises
    ------
    ProtocolError
        Naming ``source``, the field path and what to change.
    """
    data = _checked_data(data, source)
    try:
        protocol = Protocol.model_validate(data)
    except ValidationError as exc:
        lines = [f"{source}: {_format_loc(e['loc'])}: {_plain(e)}" for e in exc.errors()]
        raise ProtocolError("\n".join(lines)) from None
    check_rules(protocol, source)
    return protocol


def load_protocol(path: str | Path) -> Protocol:
    """Read and validate a protocol TOML file.

    Raises
    ------
    ProtocolError
        When the file cannot be read, is not TOML, or is not a valid protocol.
    """
    path = Path(path)
    data = read_toml(path, what="protocol", error=ProtocolError, max_bytes=settings.MAX_PROTOCOL_BYTES,
                     max_nesting=settings.MAX_PROTOCOL_NESTING)
    return parse_protocol(data, source=str(path.name))
