"""Properties over random protocols and runs (Hypothesis).

* No input gives anything but a result or a :class:`GuardbandError`: not
  a protocol, not a runs file (as text or as bytes), not a planning step.
* A refused runs file's message names the file and where the problem is
  (a row, a column, a byte, or the file as a whole).
* Cases that cannot be planned are rejected with ``assume``, and each
  planning property counts the plans it checked: a run that checked no
  plan, or no proposal, fails.
* Every proposal lies inside the design space (``DesignSpace.contains``)
  and passes the screen.
* Every candidate is either a survivor or an exclusion, exactly once.
* Raising the threshold never admits a candidate.

Pools are small (100 candidates) and examples few, so the file runs in
seconds, not minutes.
"""

from __future__ import annotations

import codecs
import hashlib
import re

import numpy as np
from hypothesis import HealthCheck, assume, event, example, given, settings
from hypothesis import strategies as st

from guardband.planner.errors import GuardbandError, RunsDataError
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.inputs.runs import parse_runs_text, read_runs_bytes
from guardband.planner.step import plan_step
from guardband.planner.app.workflow import exclusion_table

FAST = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
PLANS = settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                     HealthCheck.data_too_large])
NAMES = ["a", "b", "c", "t", "dose"]

numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, width=32),
    st.integers(min_value=-10**6, max_value=10**6),
    st.sampled_from([0, 1, -1, 0.5, 1e308, -0.0]),
)
junk = st.one_of(st.none(), st.text(max_size=8), st.booleans(), st.lists(st.integers(), max_size=3))
rule_text = st.builds(
    lambda x, op, k, y, c: f"{x} {op} {k} * {y} + {c}",
    st.sampled_from(NAMES + ["zz"]), st.sampled_from(["<=", ">=", "<", "==", "=<"]),
    st.sampled_from(["2", "0.5", "-1", "x"]), st.sampled_from(NAMES), st.sampled_from(["0", "0.1", "(", ""]),
)


def _factor(draw, name: str) -> dict:
    kind = draw(st.sampled_from(["continuous", "component", "discrete", "other"]))
    f: dict = {"name": name, "kind": kind}
    if kind == "discrete":
        f["levels"] = draw(st.one_of(st.lists(numbers, max_size=5), junk))
    else:
        f["lower"] = draw(st.one_of(numbers, junk))
        f["upper"] = draw(st.one_of(numbers, junk))
    if draw(st.booleans()):
        f["unit"] = draw(st.sampled_from(["kN", "mg/kg", "fraction", "", "% released"]))
    if draw(st.integers(0, 9)) == 0:
        f["extra_key"] = 1
    return f


@st.composite
def protocol_dicts(draw) -> dict:
    names = draw(st.lists(st.sampled_from(NAMES), min_size=0, max_size=4))
    data: dict = {
        "study": {"title": draw(st.text(max_size=5)), "version": "1", "author": "x"},
        "factors": [_factor(draw, n) for n in names],
        "objective": {"name": draw(st.sampled_from(["y", "a", ""])),
                      "direction": draw(st.sampled_from(["maximize", "minimize", "up"]))},
        "limits": [{"name": "imp", "upper": draw(numbers), "lower": draw(st.one_of(st.none(), numbers)),
                    "probability": draw(numbers)}],
        "screen": {"threshold": draw(numbers)},
    }
    if draw(st.booleans()):
        data["mixture"] = {"total": draw(numbers)}
    if draw(st.booleans()):
        data["constraints"] = [{"rule": draw(rule_text)}]
    if draw(st.integers(0, 4)) == 0:
        data.pop(draw(st.sampled_from(sorted(data))))
    return data


BASE = {
    "study": {"title": "t", "version": "1", "author": "me"},
    "mixture": {"total": 1.0, "tolerance": 0.002},
    "factors": [
        {"name": "a", "kind": "component", "lower": 0.1, "upper": 0.7},
        {"name": "b", "kind": "component", "lower": 0.3, "upper": 0.9},
        {"name": "t", "kind": "continuous", "lower": 10, "upper": 30, "unit": "degC"},
        {"name": "dose", "kind": "discrete", "levels": [0, 5, 10], "unit": "mg/kg"},
    ],
    "constraints": [{"rule": "a <= 2 * b"}],
    "objective": {"name": "y", "direction": "maximize"},
    "limits": [{"name": "imp", "upper": 0.15, "probability": 0.95}],
    "screen": {"threshold": 0.9, "forbidden": [{"name": "hot", "rules": ["t >= 28"]}]},
    "start": {"rules": ["t <= 20"]},
}


def _leaves(obj, path=()):
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _leaves(v, path + (k,))
    elif isinstance(obj, list) and obj and isinstance(obj[0], dict):
        for i, v in enumerate(obj):
            yield from _leaves(v, path + (i,))
    else:
        yield path


def _replaced(obj, path, value):
    if not path:
        return value
    head, rest = path[0], path[1:]
    if isinstance(obj, dict):
        return {**obj, head: _replaced(obj[head], rest, value)}
    return [(_replaced(v, rest, value) if i == head else v) for i, v in enumerate(obj)]


LEAVES = list(_leaves(BASE))


@st.composite
def near_valid_protocols(draw) -> dict:
    """The valid BASE with one or two values replaced."""
    data = BASE
    for _ in range(draw(st.integers(1, 2))):
        path = draw(st.sampled_from(LEAVES))
        value = draw(st.one_of(numbers, junk, rule_text, st.sampled_from(["a", "t", "dose", "a + b", "zz"])))
        data = _replaced(data, path, value)
    return data


@FAST
@given(st.one_of(protocol_dicts(), near_valid_protocols()))
def test_random_protocols_give_a_protocol_or_a_protocol_error(data):
    try:
        protocol = parse_protocol(data, source="random.toml")
    except GuardbandError:
        event("refused")
        return
    event("accepted")
    check = protocol.design_space().check()  # an empty space is a result, not an exception
    assert check.empty in (True, False)


PROTOCOL = parse_protocol({
    "study": {"title": "t", "version": "1", "author": "me"},
    "mixture": {"total": 1.0, "tolerance": 0.002},
    "factors": [
        {"name": "a", "kind": "component", "lower": 0.1, "upper": 0.7, "unit": "fraction"},
        {"name": "b", "kind": "component", "lower": 0.3, "upper": 0.9, "unit": "fraction"},
        {"name": "t", "kind": "continuous", "lower": 10, "upper": 30, "unit": "degC"},
    ],
    "objective": {"name": "y", "direction": "maximize"},
    "limits": [{"name": "imp", "upper": 0.15, "probability": 0.95, "unit": "%"}],
    "screen": {"threshold": 0.9},
})

cell = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.floats(0, 1).map(lambda v: f"{v:.3f}"),
    st.floats(0, 1).map(lambda v: f"{v:.3f}".replace(".", ",")),
    st.sampled_from(["", " ", "<0.05", "1.234,5", "n/a", "=1+1", '"', "\ufeff", "0.5 mg", "1e400", "\x00"]),
    st.text(max_size=6),
)
header_cell = st.sampled_from(["run_id", "a", "b", "t", "y", "imp", "notes", "t [K]", "t [degF]", "imp [ppm]",
                               "a [%]", "y [mg]", " a ", "", "A", "t [m^(9^9)]"])


GOOD_RUNS = [["run_id", "a", "b", "t", "y", "imp", "notes"],
             ["R1", "0.3", "0.7", "20", "5.0", "0.1", "first"],
             ["R2", "0.5", "0.5", "25", "6.0", "", "imp pending"],
             ["R3", "0.4", "0.6", "15", "", "", "not measured yet"]]


@FAST
@given(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 6), st.one_of(cell, header_cell)), min_size=1, max_size=3),
       st.sampled_from([",", ";", "\t"]))
def test_runs_with_a_few_bad_cells_give_a_table_or_a_runs_error(edits, sep):
    rows = [list(r) for r in GOOD_RUNS]
    for i, j, value in edits:
        rows[i][j] = value
    text = "\n".join(sep.join(r) for r in rows) + "\n"
    try:
        table = parse_runs_text(text, PROTOCOL, source="edited.csv")
    except RunsDataError as exc:
        event("refused")
        assert str(exc).startswith("edited.csv: ")
        return
    event("accepted")
    assert table.n_runs == 3 and np.all(np.isfinite(table.X))


@FAST
@given(st.lists(header_cell, min_size=0, max_size=8),
       st.lists(st.lists(cell, max_size=8), max_size=6),
       st.sampled_from([",", ";", "\t"]), st.sampled_from([None, ".", ","]))
def test_random_runs_text_gives_a_table_or_a_runs_error(header, rows, sep, decimal):
    text = "\n".join(sep.join(r) for r in [header, *rows]) + "\n"
    try:
        table = parse_runs_text(text, PROTOCOL, source="random.csv", decimal=decimal)
    except RunsDataError:
        event("refused")
        return
    event("accepted")
    _assert_table_holds(table)


def _assert_table_holds(table) -> None:
    """A table that was accepted is complete and finite where it must be."""
    assert table.X.shape == (table.n_runs, 3)
    assert np.all(np.isfinite(table.X))
    assert len(set(table.run_ids)) == table.n_runs and all(table.run_ids)
    for v in table.Y.values():
        assert not np.any(np.isinf(v))


#: What a runs error points at: a row, a column, a byte, a sheet, or the file
#: as a whole (not text, not a workbook, empty).
PLACE = re.compile(r"\brow \d+|\bcolumn |\bbyte \d+|\bsheet\b|\bthe file is\b|\bworkbook\b|\bspreadsheet\b")


def _assert_names_its_place(message: str, raw: bytes, source: str) -> None:
    """The message starts with the file's name and each problem in it says where it is."""
    assert message.startswith(f"{source}: "), message
    head, *items = message.split("\n  - ")
    for problem in items or [head]:
        assert PLACE.search(problem), message
    if not raw.startswith(b"PK"):  # text: rows are counted by line breaks
        n_lines = raw.count(b"\n") + raw.count(b"\r") + 1
        assert all(1 <= int(m) <= n_lines for m in re.findall(r"\brow (\d+)", message)), message
    assert all(0 <= int(m) < len(raw) for m in re.findall(r"\bbyte (\d+)", message)), message


GOOD_TEXT = "\n".join(",".join(r) for r in GOOD_RUNS) + "\n"
GOOD_BYTES = [GOOD_TEXT.encode("utf-8"), codecs.BOM_UTF8 + GOOD_TEXT.encode("utf-8"),
              GOOD_TEXT.encode("utf-16"), GOOD_TEXT.replace("\n", "\r\n").encode("utf-8")]


@st.composite
def edited_runs_bytes(draw) -> bytes:
    """A good runs file (UTF-8, with a BOM, UTF-16, CRLF) with up to three byte ranges replaced."""
    raw = bytearray(draw(st.sampled_from(GOOD_BYTES)))
    for _ in range(draw(st.integers(0, 3))):
        i = draw(st.integers(0, len(raw)))
        j = draw(st.integers(i, min(len(raw), i + 4)))
        raw[i:j] = draw(st.binary(max_size=4))
    return bytes(raw)


@FAST
@given(st.one_of(st.binary(max_size=300),
                 st.binary(max_size=200).map(lambda b: b"PK\x03\x04" + b),
                 st.binary(max_size=200).map(lambda b: b"\xff\xfe" + b),
                 edited_runs_bytes()),
       st.sampled_from(["runs.csv", "runs.xlsx", "runs"]))
def test_random_bytes_give_a_table_or_a_runs_error_that_says_where(raw, name):
    # any other exception type fails the test
    try:
        table = read_runs_bytes(raw, PROTOCOL, source=name, suffix=name[4:])
    except RunsDataError as exc:
        event("refused")
        _assert_names_its_place(str(exc), raw, name)
        return
    event("accepted")
    _assert_table_holds(table)
    assert table.sha256 == hashlib.sha256(raw).hexdigest()  # the digest of exactly these bytes


# ------------------------------------------------------------------ planning steps
@st.composite
def plannable(draw):
    """A valid protocol (maybe with an empty space) and runs made up for it."""
    n_comp = draw(st.sampled_from([0, 2, 3]))
    factors = []
    for k in range(n_comp):
        lo = draw(st.floats(0.0, 0.3))
        factors.append({"name": f"c{k}", "kind": "component", "lower": round(lo, 3),
                        "upper": round(lo + draw(st.floats(0.2, 0.9)), 3)})
    n_cont = draw(st.integers(1 if n_comp == 0 else 0, 2))
    for k in range(n_cont):
        lo = draw(st.floats(-50, 50))
        factors.append({"name": f"x{k}", "kind": "continuous", "lower": round(lo, 2),
                        "upper": round(lo + draw(st.floats(1, 100)), 2)})
    if draw(st.booleans()):
        factors.append({"name": "d", "kind": "discrete", "levels": sorted(draw(
            st.sets(st.integers(0, 20), min_size=2, max_size=5)))})
    names = [f["name"] for f in factors]
    data = {
        "study": {"title": "random", "version": "1", "author": "hypothesis"},
        "factors": factors,
        "objective": {"name": "y", "direction": draw(st.sampled_from(["maximize", "minimize"]))},
        # per-limit probabilities below the thresholds, so that the joint figure decides
        "limits": [{"name": f"l{j}", "upper": draw(st.floats(0, 1)), "probability": draw(st.floats(0.3, 0.8))}
                   for j in range(draw(st.integers(1, 2)))],
        "screen": {"threshold": draw(st.floats(0.3, 0.9)), "min_runs": 3,
                   "max_step": draw(st.sampled_from([None, 0.5, 2.0]))},
        "batch": {"size": draw(st.integers(1, 3)), "pool": 100, "refine": 0},
        "model": {"restarts": 1},
    }
    if n_comp:
        data["mixture"] = {"total": 1.0}
    if len(names) >= 2 and draw(st.booleans()):
        data["constraints"] = [{"rule": f"{names[0]} <= {draw(st.sampled_from([1, 2, 3]))} * {names[1]} + "
                                        f"{draw(st.sampled_from([0, 0.1, 5]))}"}]
    n_runs = draw(st.integers(3, 10))
    seed = draw(st.integers(0, 2**32 - 1))
    return data, n_runs, seed


def _runs_text(protocol, n_runs: int, seed: int) -> str:
    rng = np.random.default_rng(seed)
    space = protocol.design_space()
    if space.check().empty:
        X = np.array([[f.low for f in protocol.factors]] * n_runs)
    else:
        X = np.asarray(space.sample(n_runs, rng=rng))
    w = rng.normal(size=X.shape[1])
    U = (X - np.array([f.low for f in protocol.factors])) / np.maximum(
        np.array([f.high - f.low for f in protocol.factors]), 1e-9)
    lines = ["run_id," + ",".join(protocol.factor_names) + ",y," + ",".join(protocol.limit_names)]
    for i, (x, u) in enumerate(zip(X, U)):
        y = float(np.sin(u @ w) + 0.05 * rng.normal())
        lims = [float(0.5 * u.mean() + 0.1 * rng.normal()) for _ in protocol.limits]
        lines.append(f"R{i}," + ",".join(repr(float(v)) for v in x) + f",{y!r}," + ",".join(repr(v) for v in lims))
    return "\n".join(lines) + "\n"


def _plan_or_reject(data: dict, n_runs: int, seed: int):
    """Protocol, runs and plan of a case; a case that cannot be planned is rejected.

    An empty design space, runs that cannot be made for it, or a step that
    refuses raises a :class:`GuardbandError` (any other exception fails the
    test); ``assume`` then tells Hypothesis to draw another case instead of
    counting this one as checked.
    """
    try:
        protocol = parse_protocol(data)
        runs = parse_runs_text(_runs_text(protocol, n_runs, seed), protocol)
        return protocol, plan_step(protocol, runs, seed=seed)
    except GuardbandError as exc:
        event(f"not plannable: {type(exc).__name__}")
        assume(False)


#: A case that is plannable by design and has proposals and survivors to check
#: (components and a process factor, one limit that most of the space meets).
PLANNABLE = ({
    "study": {"title": "known plannable", "version": "1", "author": "test"},
    "mixture": {"total": 1.0},
    "factors": [{"name": "c0", "kind": "component", "lower": 0.1, "upper": 0.8},
                {"name": "c1", "kind": "component", "lower": 0.2, "upper": 0.9},
                {"name": "x0", "kind": "continuous", "lower": -5.0, "upper": 45.0}],
    "objective": {"name": "y", "direction": "maximize"},
    "limits": [{"name": "l0", "upper": 0.6, "probability": 0.6}],
    "screen": {"threshold": 0.5, "min_runs": 3, "max_step": None},
    "batch": {"size": 2, "pool": 100, "refine": 0},
    "model": {"restarts": 1},
}, 8, 0)


def test_random_plans_meet_every_hard_constraint_and_account_for_every_candidate():
    seen = {"plans": 0, "proposals": 0}

    @PLANS
    @example(PLANNABLE)
    @given(plannable())
    def check(case):
        protocol, result = _plan_or_reject(*case)
        seen["plans"] += 1
        seen["proposals"] += len(result.proposals)
        event(f"proposals {bool(result.proposals)}")
        space = protocol.design_space()
        X = np.array([p.x for p in result.proposals]).reshape(len(result.proposals), len(protocol.factors))
        assert np.all(space.contains(X))
        for p in result.proposals:
            assert p.joint >= protocol.screen.threshold
            for lim in protocol.limits:
                assert p.p[lim.name] >= lim.probability
        s = result.screen
        # candidates = survivors + exclusions, each exactly once
        assert s.n == result.pool.shape[0]
        assert sum(s.counts().values()) == s.n
        header, rows = exclusion_table(result)
        status = [r[header.index("status")] for r in rows]
        assert len(rows) == s.n
        assert status.count("survived") == int(s.survives.sum())
        assert status.count("excluded") == s.n - int(s.survives.sum())
        assert all((r == "") == bool(v) for r, v in zip(s.reason, s.survives))
        assert np.all(s.joint[s.survives] >= protocol.screen.threshold)

    check()
    # the checks above ran on real plans (rejected cases do not count towards
    # max_examples), and on proposals, not only on empty batches
    assert seen["plans"] >= PLANS.max_examples
    assert seen["proposals"] > 0


def test_raising_the_threshold_never_admits_a_candidate():
    seen = {"pairs": 0, "survivors": 0}

    @PLANS
    @example(PLANNABLE, 0.5)
    @given(plannable(), st.floats(0.0, 1.0))
    def check(case, share):
        data, n_runs, seed = case
        threshold = data["screen"]["threshold"]
        higher = {**data, "screen": {**data["screen"], "threshold": threshold + share * (0.99 - threshold)}}
        _, a = _plan_or_reject(data, n_runs, seed)
        _, b = _plan_or_reject(higher, n_runs, seed)
        seen["pairs"] += 1
        seen["survivors"] += int(a.screen.survives.sum())
        # the same seed draws the same pool (refinement is off), so candidates correspond
        np.testing.assert_array_equal(a.pool, b.pool)
        assert not np.any(b.screen.survives & ~a.screen.survives)
        event(f"survivors {int(a.screen.survives.sum()) > 0}, fewer at the higher threshold "
              f"{int(b.screen.survives.sum()) < int(a.screen.survives.sum())}")

    check()
    assert seen["pairs"] >= PLANS.max_examples
    assert seen["survivors"] > 0  # some candidate could have been wrongly kept
