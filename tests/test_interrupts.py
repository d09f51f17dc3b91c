"""Ctrl-C in any check: CheckInterrupted (a KeyboardInterrupt), promptly, with what was done.

A cost that raises KeyboardInterrupt at its k-th call stands in for the user's Ctrl-C
(Python raises it in whatever code runs when the signal arrives, usually the cost).
"Promptly" is counted, not timed: once the interrupt is raised, the cost is not called
again.  The calls at which each stage runs are counted in tests/test_evaluations.py:
1 or 2 base calls, then 24 along the noise lines, then the stencils.
"""
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit import CheckInterrupted

X = np.linspace(0.5, 2.0, 6)
BASE_CALLS, LINE_CALLS = 2, 24


def smooth(x):
    return float(np.sum(np.sin(x) * x))


def smooth_grad(x):
    return np.sin(x) + x * np.cos(x)


class InterruptAt:
    """The cost, raising KeyboardInterrupt at call number `k` (1-based), counting calls."""

    def __init__(self, k, cost=smooth):
        self.k, self.cost, self.calls = k, cost, 0
        self.lock = threading.Lock()

    def __call__(self, x):
        with self.lock:
            self.calls += 1
            n = self.calls
        if n == self.k:
            raise KeyboardInterrupt
        return self.cost(x)


def interrupted(call, k, cost=smooth):
    """Run call(cost) with the interrupt at call k; returns (exception, cost)."""
    c = InterruptAt(k, cost)
    with pytest.raises(CheckInterrupted) as info:
        call(c)
    assert isinstance(info.value, KeyboardInterrupt)
    return info.value, c


# k = 1: the base call; 5: the noise lines; 30: the stencils (central differences)
@pytest.mark.parametrize("k", [1, 5, 30])
def test_numeric_gradient_is_not_swallowed(k):
    exc, cost = interrupted(lambda c: gk.numeric_gradient(c, X), k)
    assert cost.calls == k and exc.report is None and exc.what == "numeric gradient"


@pytest.mark.parametrize("k", [1, 5, 40])
def test_remainder_order_is_not_swallowed(k):
    # 40 lies in the remainder's own steps (1 base call and 24 noise-line calls before)
    exc, cost = interrupted(lambda c: gk.remainder_order(c, X, smooth_grad, seed=0), k)
    assert cost.calls == k and "remainder order" in str(exc)


@pytest.mark.parametrize("k", [1, 3, 20])
def test_estimate_noise_is_not_swallowed(k):
    exc, cost = interrupted(lambda c: gk.estimate_noise(c, X), k)
    assert cost.calls == k and "noise estimate" in str(exc)


@pytest.mark.parametrize("k", [1, 10, 28])
def test_locate_mismatches_is_not_swallowed(k):
    # 28: among the group probes of 64 coordinates (26 calls to prepare before)
    params = np.linspace(0.5, 2.0, 64)
    exc, cost = interrupted(lambda c: gk.locate_mismatches(c, params, smooth_grad, seed=0), k)
    assert cost.calls == k
    if k > BASE_CALLS + LINE_CALLS:
        assert exc.report.interrupted and exc.report.title == "mismatch search"


@pytest.mark.parametrize("k", [2, 7, BASE_CALLS + LINE_CALLS + 1])
def test_compare_gradient_during_the_base_calls_and_noise_lines_stops_at_once(k):
    # the second base call, a noise line, the first call of the complex-step probe
    exc, cost = interrupted(lambda c: gk.compare_gradient(c, X, smooth_grad), k)
    assert cost.calls == k
    if exc.report is not None:
        assert exc.report.interrupted and not exc.report.passed
        assert all(r.verdict == "agree" for r in exc.report.rows)


def test_compare_gradient_during_the_sweep_carries_the_finished_rows():
    k = BASE_CALLS + LINE_CALLS + 7     # central differences: 2 calls per coordinate
    exc, cost = interrupted(lambda c: gk.compare_gradient(c, X, smooth_grad, method="central"),
                            k)
    report = exc.report
    assert cost.calls == k and report.interrupted and not report.passed
    assert [r.name for r in report.rows] == ["x[0]", "x[1]", "x[2]"]
    assert all(r.verdict == "agree" for r in report.rows)
    assert "INTERRUPTED" in report.to_text()


def test_the_gradient_function_interrupted_raises_check_interrupted():
    def slow_gradient(x):
        raise KeyboardInterrupt
    with pytest.raises(CheckInterrupted):
        gk.compare_gradient(smooth, X, slow_gradient)


def test_an_interrupted_check_prints_nothing(capfd):
    interrupted(lambda c: gk.compare_gradient(c, X, smooth_grad, method="central",
                                              progress=False), 30)
    out, err = capfd.readouterr()
    assert out == "" and err == ""


def test_compare_jacobian_carries_the_jacobians_partial_report():
    def fun(x):
        return np.array([np.sum(x ** 2), np.sum(np.sin(x)), np.prod(x)])

    def jac_wrong_in_y1(x):
        return np.stack([2 * x, 1.5 * np.cos(x), np.prod(x) / x])
    # Every output reads the same points from the cache (2 base calls, 24 on the noise
    # lines, 12 for central differences), so y[0] makes the first 38 calls; y[1]'s rows
    # disagree and are rechecked at new points: call 40 falls in that recheck of y[1].
    exc, cost = interrupted(lambda c: gk.compare_jacobian(c, X, jac_wrong_in_y1,
                                                          method="central"), 40, cost=fun)
    report = exc.report
    assert cost.calls == 40 and report.title == "jacobian check" and report.interrupted
    names = [r.name for r in report.rows]
    assert [n for n in names if n.startswith("y[0]")] == [f"y[0] wrt x[{i}]" for i in range(6)]
    assert any(n.startswith("y[1] wrt") for n in names)
    assert not any(n.startswith("y[2]") for n in names)
    assert report.extra == {"outputs": 3, "inputs": 6} and not report.passed


@pytest.mark.parametrize("k, rows", [(4, None), (6, 0)])
def test_vectorized_interrupt_stops_at_once(k, rows):
    # batched calls: 2 base calls, one batch per noise line (calls 3-5), one for the stencils
    def batched(x):
        return np.sum(np.sin(x) * x, axis=1)
    exc, cost = interrupted(lambda c: gk.compare_gradient(c, X, smooth_grad, method="central",
                                                          vectorized=True), k, cost=batched)
    assert cost.calls == k
    assert (exc.report is None) if rows is None else len(exc.report.rows) == rows


def test_thread_pool_interrupt_in_a_worker_stops_the_check():
    k = BASE_CALLS + LINE_CALLS + 5
    with ThreadPoolExecutor(max_workers=2) as pool:
        exc, cost = interrupted(lambda c: gk.compare_gradient(c, X, smooth_grad,
                                                              method="central",
                                                              executor=pool), k)
    # the other worker may finish the call it is in, and no more: the shares stop
    assert k <= cost.calls <= k + 1
    assert exc.report.interrupted and len(exc.report.rows) < X.size
