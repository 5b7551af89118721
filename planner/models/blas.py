"""Hold BLAS to one thread: the one limiter that model work, a planning step,
the design-space sampler and the simulator share.

Two reasons. Speed: the matrices are n_runs square (hundreds) and a
hyperparameter search factorises them hundreds of times; waking BLAS
threads for each costs more than it saves (measured: one thread about twice
as fast as two on a 2-core machine, see ``benchmarks/models.py``). Same
bits on any machine: a BLAS routine run on a different number of threads
sums in a different order (measured: the refined candidates of a plan
differed in the 7th digit between one and two threads).

The BLAS thread count is process-wide, so every user in every Python thread
shares one limit: the first to enter :func:`blas_limit` sets it, the last
to leave restores the setting from before. Nesting is allowed.
"""

from __future__ import annotations

import contextlib
import functools
import threading

import scipy.linalg  # noqa: F401  (loads scipy's BLAS before the controller looks for libraries)

try:  # a dependency of scikit-learn, so normally present
    from threadpoolctl import ThreadpoolController
except ImportError:  # pragma: no cover
    ThreadpoolController = None

__all__ = ["BLAS_THREADS", "blas_limit", "limited_blas", "hold_blas_limit"]

#: BLAS threads inside :func:`blas_limit`; ``None`` leaves the process's
#: BLAS setting alone.
BLAS_THREADS = 1

_lock = threading.Lock()
_state = {"depth": 0, "limiter": None}


@functools.cache
def _controller():
    # created on first use, after numpy's and scipy's BLAS libraries are loaded
    return ThreadpoolController()


def _enter() -> bool:
    """Count one user in, setting the limit if it is the first; False if no limit applies."""
    if ThreadpoolController is None or BLAS_THREADS is None:
        return False
    with _lock:
        if _state["depth"] == 0:
            _state["limiter"] = _controller().limit(limits=BLAS_THREADS, user_api="blas")
        _state["depth"] += 1
    return True


def _leave() -> None:
    """Count one user out, restoring the earlier setting if it is the last."""
    with _lock:
        _state["depth"] -= 1
        if _state["depth"] == 0:
            _state["limiter"].restore_original_limits()
            _state["limiter"] = None


@contextlib.contextmanager
def blas_limit():
    """Hold BLAS at ``BLAS_THREADS`` threads inside the block; re-entrant and thread-safe."""
    if not _enter():
        yield
        return
    try:
        yield
    finally:
        _leave()


def limited_blas(method):
    """Decorator: run ``method`` under :func:`blas_limit`."""

    @functools.wraps(method)
    def wrapper(*args, **kwargs):
        # blas_limit() spelled out: predictions at a handful of points in a
        # local refinement pass here thousands of times per step
        if not _enter():
            return method(*args, **kwargs)
        try:
            return method(*args, **kwargs)
        finally:
            _leave()

    return wrapper


def hold_blas_limit() -> None:
    """Hold BLAS at ``BLAS_THREADS`` threads until the process ends.

    For the initialiser of a worker process: the limit is entered and never
    left, so every later :func:`blas_limit` in the process nests inside it.
    """
    _enter()
