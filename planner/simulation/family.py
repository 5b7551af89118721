"""A generated family of constrained test problems, for measuring the screen's promise.

The built-in problems (:mod:`planner.simulation.problems`) are few and the
screen was tuned on them. A promise such as "passes at 0.95 means that
about 95% of such runs meet every limit" must hold on problems nobody tuned
it on; this module draws such problems from distributions of parameters,
seeded, so that ``family_problem(index, seed)`` is the same problem on
every run and nobody adjusts the planner to one of them.

What a problem is made of
-------------------------
Factors (2 to 8): a box of continuous factors, or a mixture of 3 to 8
components (bounds drawn, summing to 1), some with one process factor.
Every response is a function of the factors scaled to [0, 1] by their
reachable ranges (``u``). One or two limited responses, each of a shape
class (:data:`SHAPES`):

``half-space``  a linear function, an upper limit;
``ball``        the distance from a centre (weighted), an upper limit;
``shell``       the same distance between a lower and an upper limit;
``band``        a linear function between two limits (|linear| <= w);
``bumps``       a sum of 2 to 5 Gaussian bumps, an upper or a lower limit;
``sigmoid``     a logistic function of a curved function with a high gain
                (the limited response rises sharply outside a curved region);
``saturating``  1 - exp(-k z) of a linear z, an upper or a lower limit.

A limit depends on one factor only (a quarter of them) or on every free
factor. The limits' bounds are quantiles of the response over a sample of
the design space, so that a drawn share (:data:`SHARE_ONE_LIMIT`) of the
space meets each one. The objective is linear plus a mild curvature, its
direction drawn towards where the limits are broken, so that the best
feasible region touches a limit. Measurement noise: none, or an sd that is
a share (:data:`planner.settings.FAMILY_NOISE_SHARES`) of each response's
range; the limits of a noisy problem are judged on the next measurement or
on the true value, and the measurement sd is stated in the protocol for
half of them (the models estimate it otherwise).

Checks on every problem
-----------------------
A drawn problem is kept only when the share of the design space meeting
every limit lies in :data:`planner.settings.FAMILY_FEASIBLE_SHARE`; the
limits cost the objective at least :data:`planner.settings.FAMILY_BIND_MIN`
of its range; its start is feasible enough (the whole space, when at least
:data:`planner.settings.FAMILY_START_SHARE` of it is feasible, else a box
around a well-inside point with at least
:data:`planner.settings.FAMILY_START_BOX_SHARE` feasible; and either way
starting designs hold at least
:data:`planner.settings.FAMILY_START_MIN_FEASIBLE` runs meeting every
limit); and at the optimum (:func:`locate_optimum`) some limit is within
:data:`planner.settings.FAMILY_ACTIVE_TOL` of its bound. Otherwise the next
attempt (a new seed, derived from index and attempt) is drawn.

The shape class and the dimension cycle with the index (every class and
every dimension appear in any 49 consecutive problems); everything else is
drawn. Protocol settings are the defaults except the screen threshold
(0.95 here; a benchmark replaces it, with the batch size, pool and refine).
"""

from __future__ import annotations

import copy
import dataclasses
import re
from dataclasses import dataclass, field
from functools import partial

import numpy as np
from scipy.special import expit, logit

from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.models.parallel import map_jobs
from guardband.planner.settings import (
    FAMILY_ACTIVE_TOL,
    FAMILY_BIND_MIN,
    FAMILY_BUDGET,
    FAMILY_FEASIBLE_SHARE,
    FAMILY_N_START,
    FAMILY_NOISE_SHARES,
    FAMILY_OPTIMUM_POLISH,
    FAMILY_OPTIMUM_SAMPLES,
    FAMILY_SIZE,
    FAMILY_START_BOX_SHARE,
    FAMILY_START_MIN_FEASIBLE,
    FAMILY_START_SHARE,
)
from guardband.planner.simulation.loop import start_runs
from guardband.planner.simulation.problems import Problem, locate_optimum
from guardband.safety.limits import met_every_limit

__all__ = ["SHAPES", "TAG_KEYS", "family_problem", "family_name", "family_index", "generate_family", "with_settings",
           "FamilyResponses", "LimitShape"]

SHAPES = ("half-space", "ball", "shell", "band", "bumps", "sigmoid", "saturating")
DIMENSIONS = tuple(range(2, 9))
#: Tags every generated problem carries (for grouping results).
TAG_KEYS = ("shape", "shapes", "dimension", "domain", "noise", "judged_on", "sd_stated",
            "depends", "n_limits", "start", "direction")

#: Sample of the design space on which bounds, shares and ranges are set.
GENERATION_SAMPLE = 4000
#: Attempts per index before giving up (each with its own derived seed).
MAX_ATTEMPTS = 40
#: Share of the space meeting a limit: one limit; each of two limits.
SHARE_ONE_LIMIT = (0.2, 0.7)
SHARE_TWO_LIMITS = (0.45, 0.85)
#: Probabilities: a mixture (3+ factors); a process factor with it (4+);
#: two limits; a limit on one factor only; a start in the whole space.
P_MIXTURE, P_PROCESS, P_TWO_LIMITS, P_ONE_FACTOR, P_WHOLE_START = 0.4, 0.5, 0.3, 0.25, 0.5
#: Noise levels drawn with these probabilities (FAMILY_NOISE_SHARES order).
P_NOISE = (0.4, 0.3, 0.3)
#: Gain of a sigmoid limit, in units of its curved function's interquartile range.
SIGMOID_GAIN = (10.0, 40.0)
#: Level of a sigmoid limit (the response runs from 0 to 1).
SIGMOID_LEVEL = (0.1, 0.5)
#: Rate k of a saturating limit, 1 - exp(-k z) with z in [0, 1].
SATURATION_RATE = (3.0, 10.0)
#: Bumps: count, height, width (per sqrt of the factors it depends on).
BUMPS = ((2, 5), (0.5, 1.5), (0.2, 0.4))
#: Half-width of a starting box (share of each factor's range), shrunk by
#: START_SHRINK until enough of it is feasible.
START_HALF_WIDTH, START_SHRINK, START_TRIES = 0.2, 0.7, 5
#: Starting designs drawn to check a start (see _starts_feasible).
START_DESIGNS = 2
#: Response quantiles whose difference is a response's "range".
RANGE_QUANTILES = (0.01, 0.99)


# ------------------------------------------------------------ responses
@dataclass(frozen=True)
class LimitShape:
    """One limited response as a function of unit-scaled factors.

    Attributes
    ----------
    kind : str
        One of :data:`SHAPES`.
    support : tuple of int
        The factors (columns of ``U``) it depends on.
    params : dict of str to ndarray or float
    offset, scale : float
        The value reported is ``offset + scale * g(U)``.
    """

    kind: str
    support: tuple
    params: dict
    offset: float = 0.0
    scale: float = 1.0

    def raw(self, U: np.ndarray) -> np.ndarray:
        """g(U) before the affine change of units; U has shape (n, n_factors)."""
        Z = U[:, list(self.support)]
        p = self.params
        if self.kind in ("half-space", "band"):
            return Z @ p["w"]
        if self.kind in ("ball", "shell"):
            return np.sqrt(np.sum(p["a"] * (Z - p["c"]) ** 2, axis=1))
        if self.kind == "bumps":
            d2 = np.sum((Z[:, None, :] - p["m"][None, :, :]) ** 2, axis=2)
            return np.exp(-d2 / (2.0 * p["s"] ** 2 * Z.shape[1])) @ p["h"]
        if self.kind == "sigmoid":
            q = np.sqrt(np.sum(p["a"] * (Z - p["c"]) ** 2, axis=1)) + p["beta"] * (Z @ p["w"])
            return expit(p["gain"] * (q - p["q0"]))
        if self.kind == "saturating":
            z = (Z @ p["w"] - p["zmin"]) / p["zspan"]
            return 1.0 - np.exp(-p["k"] * z)
        raise ValueError(f"unknown limit shape {self.kind!r}; shapes: {', '.join(SHAPES)}")

    def __call__(self, U: np.ndarray) -> np.ndarray:
        return self.offset + self.scale * self.raw(U)


@dataclass(frozen=True)
class FamilyResponses:
    """The lab of a generated problem: true responses for runs in protocol units.

    Attributes
    ----------
    lo, span : ndarray of shape (n_factors,)
        Reachable range of each factor (``u = (x - lo) / span``).
    objective : str
    a, b, e : ndarray of shape (n_factors,)
        Objective ``offset + scale * sign * (a @ u + sum(b * (u - e)**2))``.
    sign, offset, scale : float
    limits : dict of str to LimitShape
    """

    lo: np.ndarray
    span: np.ndarray
    objective: str
    a: np.ndarray
    b: np.ndarray
    e: np.ndarray
    sign: float
    offset: float
    scale: float
    limits: dict = field(default_factory=dict)

    def unit(self, X) -> np.ndarray:
        """Unit-scaled factors of runs X, shape (n, n_factors)."""
        return (np.atleast_2d(np.asarray(X, dtype=float)) - self.lo) / self.span

    def raw_objective(self, U: np.ndarray) -> np.ndarray:
        """The objective's rising part (towards the limits), before units and direction."""
        return U @ self.a + np.sum(self.b * (U - self.e) ** 2, axis=1)

    def __call__(self, X) -> dict:
        U = self.unit(X)
        out = {self.objective: self.offset + self.scale * self.sign * self.raw_objective(U)}
        out.update({name: shape(U) for name, shape in self.limits.items()})
        return out


# ------------------------------------------------------------- drawing
def _factors(rng, dim: int) -> tuple[list[dict], str, dict | None]:
    """Factor dicts, the domain tag and the mixture table."""
    if dim >= 3 and rng.random() < P_MIXTURE:
        n_proc = 1 if dim >= 4 and rng.random() < P_PROCESS else 0
        k = dim - n_proc
        lower = rng.uniform(0.0, 0.6 / k, size=k)
        upper = np.minimum(1.0, lower + rng.uniform(0.25, 0.9, size=k))
        if upper.sum() < 1.05:
            upper = np.minimum(1.0, lower + (upper - lower) * (1.05 - lower.sum()) / (upper - lower).sum())
        factors = [{"name": f"c{j + 1}", "kind": "component", "lower": round(float(lo), 4),
                    "upper": round(float(hi), 4), "unit": "fraction"} for j, (lo, hi) in enumerate(zip(lower, upper))]
        factors += _continuous(rng, n_proc, prefix="p")
        return factors, "mixture+process" if n_proc else "mixture", {"total": 1.0}
    return _continuous(rng, dim, prefix="x"), "box", None


def _continuous(rng, n: int, *, prefix: str) -> list[dict]:
    out = []
    for j in range(n):
        lo = round(float(rng.uniform(0.0, 50.0)), 2)
        out.append({"name": f"{prefix}{j + 1}", "kind": "continuous", "lower": lo,
                    "upper": round(lo + float(rng.uniform(1.0, 100.0)), 2)})
    return out


def _unit_vector(rng, n: int) -> np.ndarray:
    w = rng.normal(size=n)
    return w / max(np.linalg.norm(w), 1e-12)


def _draw_shape(rng, kind: str, support: tuple, U: np.ndarray, share: float) -> tuple[LimitShape, dict]:
    """A limit shape on ``support`` and its bounds, met by about ``share`` of the sample U."""
    n = len(support)
    Z = U[:, list(support)]
    params: dict = {}
    if kind in ("half-space", "band"):
        params["w"] = _unit_vector(rng, n)
    elif kind in ("ball", "shell"):
        params["a"], params["c"] = rng.uniform(0.5, 2.0, n), rng.uniform(0.2, 0.8, n)
    elif kind == "bumps":
        count = int(rng.integers(BUMPS[0][0], BUMPS[0][1] + 1))
        params.update(m=rng.uniform(0.0, 1.0, (count, n)), h=rng.uniform(*BUMPS[1], count),
                      s=rng.uniform(*BUMPS[2], count))
    elif kind == "sigmoid":
        params.update(a=rng.uniform(0.5, 2.0, n), c=rng.uniform(0.2, 0.8, n),
                      w=_unit_vector(rng, n), beta=float(rng.uniform(0.0, 0.5)), q0=0.0, gain=1.0)
        q = np.sqrt(np.sum(params["a"] * (Z - params["c"]) ** 2, axis=1)) + params["beta"] * (Z @ params["w"])
        iqr = max(float(np.subtract(*np.quantile(q, [0.75, 0.25]))), 1e-6)
        params["gain"] = float(rng.uniform(*SIGMOID_GAIN)) / iqr
        level = float(rng.uniform(*SIGMOID_LEVEL))
        # the limit sits at `level`; q0 puts that level at the share's quantile of q
        params["q0"] = float(np.quantile(q, share)) - float(logit(level)) / params["gain"]
    elif kind == "saturating":
        w = _unit_vector(rng, n)
        params.update(w=w, zmin=float(np.minimum(w, 0).sum()), zspan=float(np.abs(w).sum()),
                      k=float(rng.uniform(*SATURATION_RATE)))
    shape = LimitShape(kind, support, params)
    g = shape.raw(U)
    if kind in ("shell", "band"):
        q_low = float(rng.uniform(0.05, max(0.05, 0.95 - share)))
        bounds = {"lower": float(np.quantile(g, q_low)), "upper": float(np.quantile(g, q_low + share))}
    elif kind in ("bumps", "saturating") and rng.random() < 0.5:
        bounds = {"lower": float(np.quantile(g, 1.0 - share))}
    elif kind == "sigmoid":
        bounds = {"upper": level}
    else:
        bounds = {"upper": float(np.quantile(g, share))}
    # a change of units: the models must not depend on them
    offset, scale = float(rng.uniform(-10.0, 50.0)), float(10.0 ** rng.uniform(-1.0, 2.0))
    shape = LimitShape(kind, support, params, offset, scale)
    return shape, {k: offset + scale * v for k, v in bounds.items()}


def _spread(v: np.ndarray) -> float:
    q = np.quantile(v, RANGE_QUANTILES)
    return max(float(q[1] - q[0]), 1e-12)


def _margins(limits: list[dict], Y: dict, spread: dict) -> np.ndarray:
    """Smallest distance inside any limit (share of the response's range), shape (n,)."""
    out = None
    for lim in limits:
        y = np.asarray(Y[lim["name"]], float)
        for side, sgn in (("upper", 1.0), ("lower", -1.0)):
            if side in lim:
                m = sgn * (lim[side] - y) / spread[lim["name"]]
                out = m if out is None else np.minimum(out, m)
    return out


def _start_region(rng, protocol, X, ok, depth, lo, span, responses):
    """Rules of a box around a well-inside feasible point, or None when none is safe enough.

    The box's half-width starts at START_HALF_WIDTH of each factor's range and
    shrinks until at least FAMILY_START_BOX_SHARE of a sample of it meets
    every limit.
    """
    space = protocol.design_space()
    names = protocol.factor_names
    inside = np.flatnonzero(ok)
    deep = inside[depth[inside] >= np.quantile(depth[inside], 0.75)]
    anchor = X[int(rng.choice(deep))]
    eye = np.eye(len(names))
    half = START_HALF_WIDTH
    for _ in range(START_TRIES):
        a = np.round(np.maximum(lo, anchor - half * span), 6)
        b = np.round(np.minimum(lo + span, anchor + half * span), 6)
        inner = space.add_inequalities(np.vstack([-eye, eye]), np.concatenate([-a, b]))
        if not inner.check().empty:
            share = met_every_limit(protocol, responses(inner.sample(400, rng=rng))).mean()
            if share >= FAMILY_START_BOX_SHARE:
                return ([f"{n} >= {v:.6f}" for n, v in zip(names, a)]
                        + [f"{n} <= {v:.6f}" for n, v in zip(names, b)])
        half *= START_SHRINK
    return None


def _starts_feasible(data: dict, responses, seed: int) -> bool:
    """Whether starting designs of the protocol hold enough runs that meet every limit.

    A space-filling start reaches for the edges of its region, where a
    limit may cut more than in the region as a whole; so the designs
    themselves are checked: on average over START_DESIGNS of them, at least
    FAMILY_START_MIN_FEASIBLE runs out of FAMILY_N_START.
    """
    protocol = parse_protocol(data, source="starting design check")
    counts = [met_every_limit(protocol, responses(start_runs(protocol, FAMILY_N_START,
                                                          rng=np.random.default_rng(seed + k)))).sum()
              for k in range(START_DESIGNS)]
    return float(np.mean(counts)) >= FAMILY_START_MIN_FEASIBLE


# ------------------------------------------------------------ problems
def _attempt(index: int, seed: int, attempt: int) -> Problem | None:
    """One draw of problem ``index``; None when it fails a check (see the module notes)."""
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(index, attempt)))
    kind = SHAPES[index % len(SHAPES)]
    dim = DIMENSIONS[(index // len(SHAPES)) % len(DIMENSIONS)]
    factors, domain, mixture = _factors(rng, dim)
    direction = "maximize" if rng.random() < 0.5 else "minimize"
    data = {"seed": index,
            "study": {"title": f"generated problem {index} (family seed {seed})", "version": "1",
                      "author": "planner.simulation.family", "kind": "formulation"},
            "factors": factors, "objective": {"name": "perf", "direction": direction},
            "screen": {"threshold": 0.95}}
    if mixture is not None:
        data["mixture"] = mixture
    space = parse_protocol(data, source=f"family problem {index}").design_space()
    ranges = space.check().ranges
    lo, span = ranges[:, 0].copy(), ranges[:, 1] - ranges[:, 0]
    X = space.sample(GENERATION_SAMPLE, rng=rng)
    U = (X - lo) / span
    n_limits = 2 if rng.random() < P_TWO_LIMITS else 1
    kinds = [kind] + [SHAPES[int(rng.integers(len(SHAPES)))] for _ in range(n_limits - 1)]
    shares = SHARE_ONE_LIMIT if n_limits == 1 else SHARE_TWO_LIMITS
    shapes, limits, depends = {}, [], []
    for k, limit_kind in enumerate(kinds):
        one = rng.random() < P_ONE_FACTOR
        support = (int(rng.integers(dim)),) if one else tuple(range(dim))
        shape, bounds = _draw_shape(rng, limit_kind, support, U, float(rng.uniform(*shares)))
        name = f"limit_{'ab'[k]}"
        shapes[name] = shape
        limits.append({"name": name, "probability": 0.95, **bounds})
        depends.append("one factor" if one else "all factors")
    # the objective rises towards where the limits are broken, plus a random tilt
    Y0 = {n: s(U) for n, s in shapes.items()}
    data["limits"] = limits
    protocol = parse_protocol(data, source=f"family problem {index}")
    Y0[protocol.objective.name] = np.zeros(X.shape[0])
    ok = met_every_limit(protocol, Y0)
    if ok.all() or not ok.any():
        return None
    t = U[~ok].mean(axis=0) - U[ok].mean(axis=0)
    a = t / max(np.linalg.norm(t), 1e-12) + 0.6 * _unit_vector(rng, dim)
    a /= max(np.linalg.norm(a), 1e-12)
    responses = FamilyResponses(lo, span, "perf", a, rng.normal(0.0, 0.15, dim), rng.uniform(0.0, 1.0, dim),
                                1.0 if direction == "maximize" else -1.0, float(rng.uniform(-20.0, 100.0)),
                                float(10.0 ** rng.uniform(-1.0, 2.0)), shapes)
    Y = responses(X)
    share = float(ok.mean())
    rising = responses.raw_objective(U)
    binding = (rising.max() - rising[ok].max()) / max(np.ptp(rising), 1e-12)
    if not (FAMILY_FEASIBLE_SHARE[0] <= share <= FAMILY_FEASIBLE_SHARE[1]) or binding < FAMILY_BIND_MIN:
        return None
    spread = {r: _spread(Y[r]) for r in protocol.response_names}
    noise_share = float(rng.choice(FAMILY_NOISE_SHARES, p=P_NOISE))
    judged_on = "true-value" if noise_share > 0 and rng.random() < 0.5 else "measurement"
    sd_stated = noise_share > 0 and rng.random() < 0.5
    noise = {r: noise_share * spread[r] for r in protocol.response_names}
    for lim in limits:
        lim["judged_on"] = judged_on
    if sd_stated:
        for item in [data["objective"], *limits]:
            item["measurement_sd"] = noise[item["name"]]
    start = "whole space"
    whole = share >= FAMILY_START_SHARE and rng.random() < P_WHOLE_START
    design_seed = int(rng.integers(2**31))
    if not (whole and _starts_feasible(data, responses, design_seed)):
        rules = _start_region(rng, protocol, X, ok, _margins(limits, Y, spread), lo, span, responses)
        if rules is None:
            return None
        data["start"] = {"rules": rules, "note": "a box around a recipe well inside every limit"}
        start = "safe box"
        if not _starts_feasible(data, responses, design_seed):
            return None
    problem = Problem(
        name=family_name(index, seed),
        source=f"generated (planner.simulation.family, index {index}, seed {seed}, attempt {attempt})",
        protocol_dict=data, evaluate=responses, optimum=float("nan"), optimum_x=(), noise=noise,
        n_start=FAMILY_N_START, budget=FAMILY_BUDGET)
    found = locate_optimum(problem, n_samples=FAMILY_OPTIMUM_SAMPLES, n_polish=FAMILY_OPTIMUM_POLISH,
                           seed=int(rng.integers(2**31)))
    at = responses(found.x[None, :])
    if _margins(limits, at, spread)[0] > FAMILY_ACTIVE_TOL:
        return None
    tags = {"shape": kind, "shapes": "+".join(kinds), "dimension": dim, "domain": domain,
            "noise": noise_share, "judged_on": judged_on, "sd_stated": sd_stated,
            "depends": "+".join(depends), "n_limits": n_limits, "start": start, "direction": direction,
            "feasible_share": share, "objective_range": float(np.ptp(Y["perf"])),
            "attempt": attempt}
    return Problem(
        name=problem.name, source=problem.source, protocol_dict=data, evaluate=responses,
        optimum=found.value, optimum_x=tuple(float(v) for v in found.x), noise=noise,
        n_start=FAMILY_N_START, budget=FAMILY_BUDGET,
        optimum_method=f"locate_optimum: {found.method}", tags=tags)


def family_name(index: int, seed: int = 0) -> str:
    """The name of problem ``index`` of the family drawn with ``seed``: ``family-s<seed>-<index>``."""
    return f"family-s{seed}-{index:03d}"


def family_index(name: str) -> tuple[int, int] | None:
    """``(index, seed)`` of a name :func:`family_name` gives; None for any other name."""
    m = re.fullmatch(r"family-s(\d+)-(\d+)", name)
    return (int(m.group(2)), int(m.group(1))) if m else None


def family_problem(index: int, seed: int = 0) -> Problem:
    """Problem ``index`` of the family drawn with ``seed`` (the same on every call).

    Parameters
    ----------
    index : int
        0, 1, 2, ...; the shape class is ``SHAPES[index % 7]`` and the
        dimension ``2 + (index // 7) % 7``.
    seed : int

    Returns
    -------
    Problem
        With ``tags`` (see :data:`TAG_KEYS`, plus ``feasible_share``,
        ``objective_range`` and ``attempt``).

    Raises
    ------
    RuntimeError
        When no attempt out of MAX_ATTEMPTS passes the checks.
    """
    if index < 0 or seed < 0:
        raise ValueError(f"index and seed must be >= 0, got index {index}, seed {seed}")
    for attempt in range(MAX_ATTEMPTS):
        problem = _attempt(int(index), int(seed), attempt)
        if problem is not None:
            return problem
    raise RuntimeError(f"family problem {index} (seed {seed}): no draw passed the checks in "
                       f"{MAX_ATTEMPTS} attempts")


def generate_family(n: int = FAMILY_SIZE, seed: int = 0, *, workers: int = 1) -> list[Problem]:
    """Problems 0 .. n-1 of the family drawn with ``seed``.

    Parameters
    ----------
    n : int
    seed : int
    workers : int
        Processes that draw problems side by side (the result is the same).

    Returns
    -------
    list of Problem
    """
    return map_jobs(partial(family_problem, seed=int(seed)), range(int(n)), workers)


def with_settings(problem: Problem, *, threshold: float, batch: int, pool: int, refine: int) -> Problem:
    """The problem with the screen threshold, batch size, pool and refine replaced.

    Every limit's own probability is set to the threshold too: the joint
    figure (either rule) reaching t already implies that each limit's
    probability reaches t, so the threshold alone decides.
    """
    data = copy.deepcopy(problem.protocol_dict)
    data["screen"]["threshold"] = float(threshold)
    for lim in data["limits"]:
        lim["probability"] = float(threshold)
    data["batch"] = {**data.get("batch", {}), "size": int(batch), "pool": int(pool), "refine": int(refine)}
    return dataclasses.replace(problem, protocol_dict=data)
