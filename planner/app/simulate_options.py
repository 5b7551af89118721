"""What ``guardband simulate`` does with its options: read them, then call :func:`simulate`.

The simulation library takes numbers, names and dicts; this module reads
the command line's spelling of them (a comma-separated strategy list,
``--noise`` values) and says in a sentence what cannot be used.
"""

from __future__ import annotations

import math
from pathlib import Path

from guardband.planner.simulation import STRATEGIES, Problem, SimulationResult, get_problem, simulate

__all__ = ["OptionError", "parse_noise", "simulate_from_options"]


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
