"""The one BLAS thread limiter (planner.models.blas) as a worker process holds it.

The nesting and thread-safety of ``blas_limit`` itself are checked in
tests/test_gp.py (fits on several threads restore the setting).
"""

from __future__ import annotations

import multiprocessing

import pytest
from threadpoolctl import ThreadpoolController, threadpool_info

from guardband.planner.models import blas, blas_limit, hold_blas_limit


def _blas_threads() -> dict[str, int]:
    return {i["filepath"]: i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"}


def _worker(_):
    # as if the process had started with two BLAS threads
    ThreadpoolController().limit(limits=2, user_api="blas")
    two = _blas_threads()
    hold_blas_limit()
    with blas_limit():
        pass  # a nested block must not restore the two threads on leaving
    return two, _blas_threads()


@pytest.mark.skipif("fork" not in multiprocessing.get_all_start_methods(), reason="needs fork")
def test_a_held_limit_outlives_nested_blocks_in_a_worker_process():
    before = _blas_threads()
    with multiprocessing.get_context("fork").Pool(1) as pool:
        two, held = pool.map(_worker, [0])[0]
    if not any(n == 2 for n in two.values()):
        pytest.skip(f"no BLAS library here takes two threads: {two}")
    assert held and all(n == blas.BLAS_THREADS for n in held.values()), held
    assert _blas_threads() == before  # the parent process is untouched
