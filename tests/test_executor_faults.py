"""Executors that fail: one clear ExecutorError with the partial report, never a raw traceback.

A process pool whose worker dies (the cost calls os._exit) is broken for good, and so is
one already shut down or whose `submit` raises: the check stops with ExecutorError (a
CheckInputError) carrying what was finished.  A share of points that fails on its way
(an ordinary exception from its future) becomes error rows, and the check goes on.
"""
import os
from concurrent.futures import Executor, Future, ProcessPoolExecutor, ThreadPoolExecutor

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit import CheckInputError, ExecutorError, GradientReport

X = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
MAIN_PID = os.getpid()   # forked workers inherit this value, and have their own pid


def quadratic(x):
    return float(np.sum(x ** 2))


def quadratic_grad(x):
    return 2 * x


def dies_stepping_the_last_coordinate(x):
    """Kills its worker process at the stencil points of x[5] (never at the base point,
    which is evaluated in the calling process, and never outside a worker)."""
    if x[5] != X[5] and np.array_equal(x[:5], X[:5]):
        if os.getpid() != MAIN_PID:
            os._exit(3)
        raise AssertionError("the test's cost would have killed the test process")
    return quadratic(x)


class SubmitRaises(Executor):
    def submit(self, fn, *args, **kwargs):
        raise OSError("no workers left")


class SubmitReturnsNumbers(Executor):
    def submit(self, fn, *args, **kwargs):
        return 42


class ShareFails(Executor):
    """Runs every share but one, whose future carries an error (a lost message, say)."""

    def __init__(self):
        self.count = 0

    def submit(self, fn, *args, **kwargs):
        self.count += 1
        future = Future()
        if self.count == 30:     # a share of the stencil sweep
            future.set_exception(ConnectionError("message lost"))
        else:
            future.set_result(fn(*args, **kwargs))
        return future


@pytest.fixture(scope="module")
def fork_pool():
    import multiprocessing

    if "fork" not in multiprocessing.get_all_start_methods():
        pytest.skip("needs the fork start method (the test's cost lives in this module)")
    yield multiprocessing.get_context("fork")


def test_a_worker_that_dies_gives_one_clear_error_with_the_partial_report(fork_pool):
    pool = ProcessPoolExecutor(max_workers=2, mp_context=fork_pool)
    try:
        with pytest.raises(ExecutorError) as info:
            gk.compare_gradient(dies_stepping_the_last_coordinate, X, quadratic_grad,
                                method="central", executor=pool)
    finally:
        pool.shutdown()
    text = str(info.value)
    assert text.startswith("executor:") and "died" in text and "BrokenProcessPool" in text
    report = info.value.report
    assert isinstance(report, GradientReport) and not report.passed
    assert not report.interrupted and any("executor" in p for p in report.problems)
    assert all(r.verdict == "agree" for r in report.rows) and len(report.rows) < X.size


def test_the_same_pool_afterwards_is_refused_clearly(fork_pool):
    pool = ProcessPoolExecutor(max_workers=2, mp_context=fork_pool)
    try:
        with pytest.raises(ExecutorError):
            gk.compare_gradient(dies_stepping_the_last_coordinate, X, quadratic_grad,
                                method="central", executor=pool)
        with pytest.raises(ExecutorError) as info:   # broken now: submit itself raises
            gk.numeric_gradient(quadratic, X, executor=pool)
    finally:
        pool.shutdown()
    assert "broken" in str(info.value) and info.value.report is None


def test_a_pool_already_shut_down():
    pool = ThreadPoolExecutor(max_workers=2)
    pool.shutdown()
    with pytest.raises(ExecutorError) as info:
        gk.compare_gradient(quadratic, X, quadratic_grad, executor=pool)
    assert "shut down" in str(info.value) and isinstance(info.value, CheckInputError)


def test_submit_raising_names_the_executor_and_its_error():
    with pytest.raises(ExecutorError) as info:
        gk.compare_gradient(quadratic, X, quadratic_grad, executor=SubmitRaises())
    text = str(info.value)
    assert "SubmitRaises" in text and "OSError: no workers left" in text and "submit" in text


def test_submit_returning_a_non_future_blames_the_executor_not_the_cost():
    with pytest.raises(ExecutorError) as info:
        gk.compare_gradient(quadratic, X, quadratic_grad, executor=SubmitReturnsNumbers())
    text = str(info.value)
    assert "SubmitReturnsNumbers.submit returned int, not a future" in text
    assert "cost" not in text


def test_a_failed_share_becomes_error_rows_and_the_check_finishes():
    report = gk.compare_gradient(quadratic, X, quadratic_grad, method="central",
                                 executor=ShareFails())
    verdicts = {r.verdict for r in report.rows}
    assert len(report.rows) == X.size and "error" in verdicts and "agree" in verdicts
    failed = [r for r in report.rows if r.verdict == "error"]
    assert all("ShareFails could not evaluate" in r.detail and "message lost" in r.detail
               for r in failed)


def test_locate_and_jacobian_carry_their_own_partial_reports():
    with pytest.raises(ExecutorError) as info:
        gk.locate_mismatches(quadratic, X, quadratic_grad, executor=SubmitReturnsNumbers())
    assert info.value.report is None      # stopped on the noise lines: nothing searched yet
    with pytest.raises(ExecutorError) as info:
        gk.compare_jacobian(lambda x: x ** 2, X, lambda x: np.diag(2 * x),
                            executor=SubmitRaises())
    assert info.value.report.title == "jacobian check"
