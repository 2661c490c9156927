"""One BLAS thread around small problems (fitcore.threads); no timings here (bench/)."""
from __future__ import annotations

import threading

import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from fitcore import threads


def _blas_threads():
    return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]


def test_small_problem_sets_one_thread_and_restores():
    if not threads._blas_libraries():
        pytest.skip("threadpoolctl finds no BLAS library here")
    with threadpool_limits(limits=2, user_api="blas"):
        assert max(_blas_threads()) == 2
        with threads.small_problem(25 * 4):
            assert set(_blas_threads()) == {1}
            with threads.small_problem(10):  # nested: still one, restored only at the end
                assert set(_blas_threads()) == {1}
            assert set(_blas_threads()) == {1}
        assert max(_blas_threads()) == 2
        with threads.small_problem(threads.SMALL + 1):  # a large problem keeps its threads
            assert max(_blas_threads()) == 2


def test_concurrent_users_restore_once():
    """A second user (another Python thread) leaving does not restore the count while
    the first is still inside."""
    if not threads._blas_libraries():
        pytest.skip("threadpoolctl finds no BLAS library here")

    def other():
        with threads.small_problem(10):
            pass

    with threadpool_limits(limits=2, user_api="blas"):
        with threads.small_problem(10):
            t = threading.Thread(target=other)
            t.start()
            t.join(5)
            assert set(_blas_threads()) == {1}
        assert max(_blas_threads()) == 2


def test_a_large_fit_runs_with_one_thread():
    """fit() of a problem above ``SMALL`` Jacobian entries also runs with one BLAS
    thread (its products are of tall, narrow matrices; issue 12's measurements) and
    restores the count after. (Common practice: the count read inside the model.)"""
    import numpy as np

    import fitcore
    from fitcore.model import Model

    if not threads._blas_libraries():
        pytest.skip("threadpoolctl finds no BLAS library here")
    seen = []

    def f(x, p):
        seen.append(max(_blas_threads()))
        return p[0] + p[1] * x

    def jac(x, p):
        return np.column_stack([np.ones_like(x), x])

    line = Model("traced_line", ("a", "b"), f, jac, guess=lambda x, y: np.array([0.0, 1.0]))
    n = threads.SMALL  # x 2 parameters: above SMALL entries
    x = np.linspace(0.0, 1.0, n)
    with threadpool_limits(limits=2, user_api="blas"):
        fitcore.fit(line, x, 1.0 + 2.0 * x, loss="huber")
        assert max(_blas_threads()) == 2
    assert seen and set(seen) == {1}
