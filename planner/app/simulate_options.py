"""What ``guardband simulate`` does with its options: read them, then call :func:`simulate`.

The simulation library takes numbers, names and dicts; this module reads
the command line's spelling of them (a comma-separated strategy list,
``--noise`` values) and says in a sentence what cannot be used.
"""

from __future__ import annotations

import math
from pathlib import Path

from guardband.planner.simulation import STRATEGIES, Problem, SimulationResult, get_problem, simulate
from guardband.planner.simulation.sweep import STEPS

__all__ = ["OptionError", "parse_noise", "parse_peers", "simulate_from_options"]


class OptionError(ValueError):
    """A simulation option given on the command line cannot be used (a usage error)."""


def parse_noise(values, problem: Problem) -> tuple[float, dict]:
    """Read ``--noise`` values: a scale (``1`` = the problem's noise, ``0`` = none) or ``NAME=SD``.

    Parameters
    ----------
    values : sequence of str
    problem : Problem

    Returns
    -------
    (scale, sds) : (float, dict of str to float)
        With only ``NAME=SD`` entries the scale is 1 and the other
        responses keep the problem's noise.

    Raises
    ------
    OptionError
        With a sentence saying what is wrong.
    """
    scale, sds = None, {}
    names = problem.protocol.response_names
    for text in values or ():
        text = str(text).strip()
        if "=" in text:
            name, _, value = text.partition("=")
            name = name.strip()
            if name not in names:
                raise OptionError(f"--noise {text!r}: {name!r} is not a response of problem "
                                  f"{problem.name!r} (responses: {', '.join(names)})")
            sd = _nonnegative(value, text)
            sds[name] = sd
        else:
            if scale is not None:
                raise OptionError(f"--noise {text!r}: give one scale only")
            scale = _nonnegative(text, text)
    if scale is None:
        scale = 1.0 if sds else 0.0
    return scale, sds


def _nonnegative(value: str, text: str) -> float:
    try:
        v = float(value)
    except ValueError:
        raise OptionError(f"--noise {text!r}: {value.strip()!r} is not a number") from None
    if not math.isfinite(v) or v < 0:
        raise OptionError(f"--noise {text!r}: must be a finite number >= 0")
    return v


def simulate_from_options(problem: str, settings: str | Path | None, *, start: int | None = None,
                          noise_values=(), strategies: str = "all", **options) -> SimulationResult:
    """:func:`simulate` with options as the command line gives them.

    Parameters
    ----------
    problem : str
        A built-in problem name.
    settings : path or None
        The settings protocol; None or ``"-"`` for the problem's own.
    start : int, optional
        Starting runs (``n_start`` of :func:`simulate`).
    noise_values : sequence of str
        ``--noise`` values (see :func:`parse_noise`).
    strategies : str
        ``"all"`` or names separated by commas.
    **options
        ``budget``, ``seeds``, ``workers``, ``seed``, ``pool_size`` and
        ``progress``, as in :func:`simulate`.

    Returns
    -------
    SimulationResult

    Raises
    ------
    OptionError
        An unknown problem or strategy, or an unreadable ``--noise`` value.
    ProtocolError
        The settings protocol cannot be read or is invalid.
    """
    try:
        prob = get_problem(problem)
    except ValueError as exc:
        raise OptionError(str(exc)) from None
    names = STRATEGIES if strategies.strip() == "all" else tuple(
        s.strip() for s in strategies.split(",") if s.strip())
    for st in names:
        if st not in STRATEGIES:
            raise OptionError(f"unknown strategy {st!r}; strategies: {', '.join(STRATEGIES)} (or all)")
    if not names:
        raise OptionError("give at least one strategy, e.g. --strategies protocol,random")
    scale, sds = parse_noise(noise_values, prob)
    return simulate(prob, settings, n_start=start, strategies=names, noise_scale=scale, noise=sds, **options)


# ------------------------------------------------------------- scenarios and sweeps
#: How each key of ``--vary`` reads its values.
_VARY_TYPES = {"threshold": float, "rule": str, "batch": int, "start": int, "budget": int, "max_step": float,
               "step": str}


def parse_vary(values) -> dict:
    """Read ``--vary KEY=V1,V2,...`` values (repeat the option for several keys).

    Returns
    -------
    dict of str to list
        Values per key of :data:`~guardband.planner.simulation.sweep.SWEEP_KEYS`, in the order given.

    Raises
    ------
    OptionError
        An unknown key, a key given twice, an empty list or a value of the wrong kind.
    """
    out: dict = {}
    for text in values or ():
        key, sep, rest = str(text).partition("=")
        key = key.strip().replace("-", "_")
        if not sep or key not in _VARY_TYPES:
            raise OptionError(f"--vary {text!r}: write KEY=V1,V2 with KEY one of {', '.join(_VARY_TYPES)}")
        if key in out:
            raise OptionError(f"--vary {text!r}: {key} is varied twice; list all its values once")
        items = [v.strip() for v in rest.split(",") if v.strip()]
        if not items:
            raise OptionError(f"--vary {text!r}: give at least one value")
        kind = _VARY_TYPES[key]
        try:
            vals = [kind(v) for v in items]
        except ValueError:
            raise OptionError(f"--vary {text!r}: every value of {key} must be "
                              f"{'a whole number' if kind is int else 'a number' if kind is float else 'a name'}") from None
        if kind is float and not all(math.isfinite(v) for v in vals):
            raise OptionError(f"--vary {text!r}: values must be finite numbers")
        if key in ("batch", "budget") and min(vals) < 1 or key == "start" and min(vals) < 3:
            raise OptionError(f"--vary {text!r}: {key} must be at least {3 if key == 'start' else 1}")
        if key == "step" and any(v not in STEPS for v in vals):
            raise OptionError(f"--vary {text!r}: a step is {' or '.join(STEPS)}")
        out[key] = list(dict.fromkeys(vals))
    return out


def parse_peers(text: str | None) -> tuple[str, ...]:
    """Read ``--peers``: ``random``, ``classical`` or both separated by a comma, or ``all``; None: none.

    Raises
    ------
    OptionError
        A name that is not a peer, or an empty list.
    """
    from guardband.planner.simulation.strategies import PEERS

    if text is None:
        return ()
    if text.strip() == "all":
        return PEERS
    names = tuple(dict.fromkeys(n.strip() for n in text.split(",") if n.strip()))
    if not names:
        raise OptionError(f"--peers {text!r}: give {', '.join(PEERS)} or all")
    for name in names:
        if name not in PEERS:
            raise OptionError(f"--peers {text!r}: {name!r} is not a peer; peers: {', '.join(PEERS)} (or all)")
    return names


def world_note(problem: Problem, settings) -> str | None:
    """A sentence when a settings protocol's factors or limits differ from the built-in problem's (None if alike).

    ``simulate --problem`` takes only the planner settings from the protocol;
    its factors and limits are the problem's. Saying so keeps a reader from
    taking the problem's limits for the protocol's.
    """
    if settings in (None, "-"):
        return None
    from guardband.planner.inputs.protocol import Protocol, load_protocol

    protocol = settings if isinstance(settings, Protocol) else load_protocol(settings)
    world = problem.protocol
    if (protocol.factor_names == world.factor_names
            and [lim.describe() for lim in protocol.limits] == [lim.describe() for lim in world.limits]
            and protocol.objective.name == world.objective.name):
        return None
    return (f"the built-in problem {problem.name!r} is simulated on its own factors "
            f"({', '.join(world.factor_names)}) and limits ({'; '.join(lim.describe() for lim in world.limits)}); "
            f"only the planner settings come from the protocol, whose limits "
            f"({'; '.join(lim.describe() for lim in protocol.limits) or 'none'}) are not simulated. "
            "To simulate the protocol's own factors and limits, give a scenario file: --scenarios FILE")


def sweep_from_options(protocol_path, *, scenarios_path=None, problem: str | None = None, vary_values=(),
                       noise_values=(), start: int | None = None, budget: int | None = None,
                       peers: str | None = None, **options):
    """:func:`~guardband.planner.simulation.sweep.run_sweep` with options as the command line gives them.

    Parameters
    ----------
    protocol_path : path or None
        The author's protocol (with ``scenarios_path``), or the settings
        protocol of a built-in ``problem`` (None or ``"-"``: the problem's own).
    scenarios_path : path, optional
        A scenario file of the protocol.
    problem : str, optional
        A built-in problem instead of a scenario file.
    vary_values, noise_values : sequences of str
        ``--vary`` and ``--noise`` values; ``--noise`` is a scale of every
        scenario's noise (default 1, as stated) for a scenario file.
    start, budget : int, optional
        Starting and planned runs (default the file's or the problem's).
    peers : str, optional
        ``--peers``: the peers run beside the planner (see :func:`parse_peers`).
    **options
        ``seeds``, ``seed`` (base seed), ``within``, ``workers``, ``scheduler``,
        ``pool_size``, ``progress``.

    Returns
    -------
    (SweepResult, title, kind)
    """
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.simulation import combine_settings
    from guardband.planner.simulation.scenarios import Scenario, load_scenarios
    from guardband.planner.simulation.sweep import run_sweep

    vary = parse_vary(vary_values)
    options["peers"] = parse_peers(peers)
    if "seed" in options:
        options["base_seed"] = options.pop("seed")
    if scenarios_path is not None:
        if protocol_path in (None, "-"):
            raise OptionError("a scenario file needs its protocol: give the protocol file first")
        protocol = load_protocol(protocol_path)
        found = load_scenarios(scenarios_path, protocol)
        scale = _noise_scale(noise_values)
        try:
            result = run_sweep(found.scenarios, lambda sc: sc.problem.protocol, vary=vary, noise_scale=scale,
                               n_start=found.start_runs if start is None else start,
                               budget=found.budget if budget is None else budget, **options)
        except ValueError as exc:
            raise OptionError(str(exc)) from None
        return result, protocol.study.title, protocol.study.kind
    try:
        prob = get_problem(problem)
    except ValueError as exc:
        raise OptionError(str(exc)) from None
    settings = None if protocol_path in (None, "-") else load_protocol(protocol_path)
    scale, sds = parse_noise(noise_values, prob)
    if sds:
        raise OptionError("a sweep takes --noise as one scale of the problem's noise, not NAME=SD")
    combined = combine_settings(prob, settings)
    note = world_note(prob, settings)
    try:
        result = run_sweep([Scenario(prob.name, "", prob)], lambda sc: combined, vary=vary, noise_scale=scale,
                           n_start=prob.n_start if start is None else start,
                           budget=prob.budget if budget is None else budget, **options)
    except ValueError as exc:
        raise OptionError(str(exc)) from None
    if note:
        import dataclasses

        result = dataclasses.replace(result, notes=(f"note: {note}",))
    return result, prob.protocol.study.title, prob.protocol.study.kind


def _noise_scale(values) -> float:
    texts = [str(v).strip() for v in values or ()]
    if len(texts) > 1 or any("=" in t for t in texts):
        raise OptionError("with a scenario file, --noise is one scale of every scenario's noise "
                          "(1: as stated, 0: none); state each response's sd in the file")
    return _nonnegative(texts[0], texts[0]) if texts else 1.0
