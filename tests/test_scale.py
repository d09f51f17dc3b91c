"""Scale: batched costs, executors (threads, processes, Dask), sampling, group testing,
progress and interrupts.  Speed itself is measured in benchmarks.py, not here."""
import pickle
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor

import numpy as np
import pytest

import gradcheck_kit as gk
from sparse_bugs import planted

N = 12
W = np.linspace(0.5, 2.0, N)
X0 = np.linspace(-1.0, 1.0, N)


def cost(x):
    return float(np.sum(W * np.cos(x)) + 0.1 * np.sum(x ** 3))


def batched_cost(x):                     # x has a leading batch axis
    return np.sum(W * np.cos(x) + 0.1 * x ** 3, axis=-1)


def grad(x):
    return -W * np.sin(x) + 0.3 * x ** 2


def wrong(x):
    g = grad(x)
    g[4] *= 1.01
    return g


def verdicts_of(report):
    return [(r.name, r.verdict, r.numeric) for r in report.rows]


@pytest.mark.parametrize("method", ["central", "richardson", "complex-step"])
def test_vectorized_gives_the_same_numbers_as_serial(method):
    # the same arithmetic on one point as on a batch row, so the numbers must match
    serial = gk.compare_gradient(batched_cost, X0, wrong, method=method)
    batched = gk.compare_gradient(batched_cost, X0, wrong, method=method, vectorized=True)
    assert [v[:2] for v in verdicts_of(serial)] == [v[:2] for v in verdicts_of(batched)]
    np.testing.assert_allclose([v[2] for v in verdicts_of(serial)],
                               [v[2] for v in verdicts_of(batched)], rtol=1e-12)
    assert [r.name for r in batched.mismatches] == ["x[4]"]


def test_vectorized_tree_params_and_autograd():
    import autograd.numpy as anp

    def loss(p):                       # p["W"] has shape (batch, 2, 2), p["b"] (batch,)
        return anp.sum(anp.sin(p["W"]) ** 2, axis=(1, 2)) + p["b"] ** 2

    params = {"W": np.array([[0.1, 0.4], [0.7, -0.3]]), "b": 0.5}
    assert gk.compare_gradient(loss, params, vectorized=True).passed


def test_vectorized_batches_respect_the_memory_bound():
    from gradcheck_kit.evaluate import CostRunner
    from gradcheck_kit.tree import flatten

    sizes = []

    def spy(x):
        sizes.append(x.shape[0])
        return batched_cost(x)
    base, layout = flatten(X0)
    runner = CostRunner(spy, layout, base, vectorized=True, chunk_bytes=5 * N * 8)
    runner.run(list(range(N)) * 2, [1e-3] * (2 * N))
    assert max(sizes) == 5 and sum(sizes) == 2 * N


def test_vectorized_cost_of_the_wrong_shape_is_explained():
    with pytest.raises(gk.CheckInputError, match="one value per batch row"):
        gk.compare_gradient(lambda x: np.sum(x), X0, grad, vectorized=True)


@pytest.mark.parametrize("make", [lambda: ThreadPoolExecutor(2), lambda: ProcessPoolExecutor(2)],
                         ids=["threads", "processes"])
def test_executors_give_identical_results_in_order(make):
    serial = gk.compare_gradient(cost, X0, wrong, method="richardson")
    with make() as pool:
        parallel = gk.compare_gradient(cost, X0, wrong, method="richardson", executor=pool)
    assert verdicts_of(serial) == verdicts_of(parallel)
    assert serial.evaluations == parallel.evaluations


def test_a_cost_a_process_pool_cannot_pickle_gets_the_way_out():
    def local_cost(x):
        return float(np.sum(x ** 2))
    with pytest.raises((pickle.PicklingError, AttributeError)):  # a local function
        pickle.dumps(local_cost)
    with ProcessPoolExecutor(1) as pool, pytest.raises(gk.CheckInputError) as info:
        gk.compare_gradient(local_cost, X0, lambda x: 2 * x, executor=pool)
    assert "module level" in str(info.value) and "ThreadPoolExecutor" in str(info.value)


def test_dask_local_cluster_gives_identical_verdicts():
    distributed = pytest.importorskip("distributed")
    serial = gk.compare_gradient(cost, X0, wrong, method="central")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        parallel = gk.compare_gradient(cost, X0, wrong, method="central",
                                       executor=client.get_executor())
    assert verdicts_of(serial) == verdicts_of(parallel)


# --- sampling -------------------------------------------------------------------------------
def test_sampled_coordinates_include_the_largest_and_follow_the_seed():
    params = {"W": np.linspace(-2, 3, 40).reshape(8, 5), "b": np.arange(3.0)}

    def f(p):
        return np.sum(p["W"] ** 2) + np.sum(p["b"] ** 2)

    def g(p):
        return {"W": 2 * p["W"], "b": 2 * p["b"]}
    one = gk.compare_gradient(f, params, g, coordinates=6, seed=4)
    two = gk.compare_gradient(f, params, g, coordinates=6, seed=4)
    other = gk.compare_gradient(f, params, g, coordinates=6, seed=5)
    names = [r.name for r in one.rows]
    assert names == [r.name for r in two.rows] and names != [r.name for r in other.rows]
    assert sum(r.parameter == "W" for r in one.rows) == 6
    assert sum(r.parameter == "b" for r in one.rows) == 3       # fewer entries than k: all
    assert "W[7, 4]" in names and "W[7, 3]" in names            # the largest |gradient|


# --- group testing ---------------------------------------------------------------------------
def test_locate_finds_exactly_the_planted_coordinates():
    bad = [17, 20_000, 49_999]
    big_cost, big_grad, x = planted(50_000, bad, seed=2)
    report = gk.locate_mismatches(big_cost, x, big_grad, seed=3)
    assert not report.passed
    assert sorted(r.flat_index for r in report.mismatches) == bad
    assert report.evaluations <= 150                            # a full sweep: 50,000
    assert any("group testing" in n for n in report.notes)


def test_locate_among_a_million_in_bounded_memory():
    """The issue's case: 3 coordinates 5% wrong among 1,000,000, at most 400 evaluations,
    memory a few parameter vectors (never n x n)."""
    import tracemalloc

    n, bad = 1_000_000, [123_456, 500_000, 999_999]
    big_cost, big_grad, x = planted(n, bad, seed=1)
    tracemalloc.start()
    report = gk.locate_mismatches(big_cost, x, big_grad, seed=2)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert sorted(r.flat_index for r in report.mismatches) == bad and not report.passed
    assert report.evaluations <= 400
    assert peak < 20 * 8 * n     # about 13 vectors were seen: point copies, the cost's own


def test_locate_passes_a_right_gradient_cheaply():
    report = gk.locate_mismatches(cost, X0, grad, seed=0)
    assert report.passed and not report.rows and report.evaluations <= 30


def test_locate_respects_the_budget():
    report = gk.locate_mismatches(cost, X0, wrong, seed=0, budget=30)
    assert not report.passed and report.evaluations <= 30
    assert "budget of 30 evaluations ran out" in report.problems[0]


# --- progress and interrupts -------------------------------------------------------------------
def test_progress_bar_can_be_forced(capsys):
    gk.compare_gradient(cost, X0, grad, method="central", progress=True)
    assert "eval" in capsys.readouterr().err
    gk.compare_gradient(cost, X0, grad, method="central", progress=False)
    assert capsys.readouterr().err == ""


def test_interrupt_ends_with_the_partial_report():
    calls = {"n": 0}

    def interrupted_cost(x):
        calls["n"] += 1
        if calls["n"] == 30:            # the user presses Ctrl-C during the sweep
            raise KeyboardInterrupt
        return cost(x)
    with pytest.raises(KeyboardInterrupt) as info:
        gk.compare_gradient(interrupted_cost, X0, grad, method="central")
    assert isinstance(info.value, gk.CheckInterrupted)
    report = info.value.report
    assert report.interrupted and not report.passed
    assert 0 < len(report.rows) < N and all(r.verdict == "agree" for r in report.rows)
    assert "INTERRUPTED" in report.to_text()     # the front ends print it


def test_an_executor_whose_tasks_fail_gives_error_rows_not_a_crash():
    from concurrent.futures import Executor, Future

    class Broken(Executor):
        def submit(self, fn, *args, **kwargs):
            future = Future()
            future.set_exception(RuntimeError("worker lost"))
            return future
    report = gk.compare_gradient(cost, X0, grad, method="central", executor=Broken())
    assert not report.passed and {r.verdict for r in report.rows} == {"error"}
    assert "worker lost" in report.rows[0].detail


def test_vectorized_cost_that_edits_its_batch_gets_fresh_rows():
    def editing(x):
        value = batched_cost(x)
        x[:] = 0.0                      # scribbles over its input batch
        return value
    clean = gk.compare_gradient(batched_cost, X0, grad, method="central", vectorized=True)
    edited = gk.compare_gradient(editing, X0, grad, method="central", vectorized=True)
    assert edited.passed and [r.numeric for r in edited.rows] == [r.numeric for r in clean.rows]
    assert any("modifies its input" in n for n in edited.notes)
