"""compare_stochastic_gradient: references that fail, interrupts, bars, executors.

The estimator is the gradient 2x of sum(x^2) (common practice) plus zero-mean normal
noise, so its mean is exactly 2x; seeds are fixed.  The tests read messages, verdicts,
row details and what reaches stderr.
"""
import concurrent.futures
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor

import numpy as np
import pytest

import gradcheck_kit as gk

X = np.array([0.5, -1.0, 2.0])


def noisy_gradient(x, rng):
    return 2 * x + 0.1 * rng.standard_normal(x.shape)


def squares(x):
    return np.sum(x ** 2)


def _check(**options):
    options.setdefault("seed", 1)
    options.setdefault("max_draws", 256)
    return gk.compare_stochastic_gradient(noisy_gradient, X, **options)


def test_a_gradient_function_that_raises_is_named():
    def gradient(x):
        raise RuntimeError("no closed form")

    with pytest.raises(gk.CheckInputError, match="gradient raised RuntimeError at params: no "
                                                 "closed form"):
        _check(gradient=gradient)


def test_a_given_gradient_with_a_nan_entry_leaves_that_row_undecided():
    report = _check(gradient=np.array([1.0, np.nan, 4.0]))
    rows = {r.name: r for r in report.rows}
    assert "the given gradient is nan here" in rows["x[1]"].detail
    assert rows["x[0]"].verdict == "agree" and rows["x[2]"].verdict == "agree"
    assert rows["x[1]"].verdict not in ("agree", "disagree")


def test_a_random_cost_cannot_be_the_reference():
    rng = np.random.default_rng(0)
    with pytest.raises(gk.CheckInputError, match="^cost: .*not deterministic"):
        _check(cost=lambda x: squares(x) + 1e-3 * rng.standard_normal())


def test_a_reference_the_cost_cannot_give_is_said_in_its_row():
    def cost(x):
        return squares(x) if x[0] == 0.5 else np.nan     # only defined on the plane x[0] = 0.5

    report = _check(cost=cost)
    row = next(r for r in report.rows if r.name == "x[0]")
    assert row.detail.startswith("the numeric reference failed here (")
    assert next(r for r in report.rows if r.name == "x[1]").verdict == "agree"


def test_progress_true_shows_a_bar_of_draws(capsys):
    report = _check(gradient=lambda x: 2 * x, progress=True)
    assert report.passed
    assert "draws" in capsys.readouterr().err


def test_ctrl_c_during_the_draws_raises_check_interrupted_with_the_partial_report():
    calls = []

    def sample(x, rng):
        calls.append(1)
        if len(calls) > 3:
            raise KeyboardInterrupt
        return noisy_gradient(x, rng)

    with pytest.raises(gk.CheckInterrupted) as info:
        gk.compare_stochastic_gradient(sample, X, gradient=lambda x: 2 * x, seed=1,
                                       max_draws=4096)
    assert "stochastic gradient check" in str(info.value)
    assert isinstance(info.value.report, gk.StochasticReport)


@pytest.mark.parametrize("sample, executor, message", [
    (3, None, r"sample_gradient: expected a callable sample_gradient\(params, rng\), got int"),
    (noisy_gradient, "pool", "executor: expected a concurrent.futures.Executor, got str"),
])
def test_bad_draw_options_are_named(sample, executor, message):
    with pytest.raises(gk.CheckInputError, match=message):
        gk.compare_stochastic_gradient(sample, X, gradient=lambda x: 2 * x, executor=executor,
                                       seed=1)


def test_a_process_pool_needs_a_sample_gradient_it_can_pickle():
    pool = ProcessPoolExecutor(max_workers=1)    # no worker starts before a submit
    try:
        with pytest.raises(gk.CheckInputError, match="a process pool must pickle sample_gradient"
                                                     ".*ThreadPoolExecutor"):
            gk.compare_stochastic_gradient(lambda x, rng: 2 * x, X, gradient=lambda x: 2 * x,
                                           executor=pool, seed=1)
    finally:
        pool.shutdown()


class _LostWorkers(concurrent.futures.Executor):
    """An executor whose every task fails before running (a pool that lost its workers)."""

    def submit(self, fn, *args, **kwargs):
        future = Future()
        future.set_exception(OSError("worker lost"))
        return future


def test_chunks_an_executor_never_ran_are_failed_draws():
    with pytest.raises(gk.CheckInputError, match="sample_gradient raised at all .* draws of the "
                                                 "first round .*OSError: worker lost"):
        gk.compare_stochastic_gradient(noisy_gradient, X, gradient=lambda x: 2 * x,
                                       executor=_LostWorkers(), seed=1)


def test_a_draw_of_the_wrong_shape_on_an_executor_is_named():
    with ThreadPoolExecutor(max_workers=2) as pool:
        with pytest.raises(gk.CheckInputError, match=r"expected shape \(3,\)"):
            gk.compare_stochastic_gradient(lambda x, rng: np.zeros(2), X,
                                           gradient=lambda x: 2 * x, executor=pool, seed=1)


def test_ctrl_c_on_an_executor_stops_the_check():
    calls = []

    def sample(x, rng):
        calls.append(1)
        if len(calls) > 50:
            raise KeyboardInterrupt
        return noisy_gradient(x, rng)

    class _Inline(concurrent.futures.Executor):
        def submit(self, fn, *args, **kwargs):
            future = Future()
            try:
                future.set_result(fn(*args, **kwargs))
            except BaseException as exc:    # noqa: B036 - hand Ctrl-C back as the pool would
                future.set_exception(exc)
            return future

    with pytest.raises(gk.CheckInterrupted):
        gk.compare_stochastic_gradient(sample, X, gradient=lambda x: 2 * x, seed=1,
                                       executor=_Inline())
