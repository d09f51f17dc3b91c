"""The fast paths change nothing a user sees (no timing here: see tests/benchmarks.py).

- Serial points share one buffer, shifted at one entry and set back around each call
  (evaluate._serial_pass): values must be bitwise those of fresh copies, also for costs
  that edit their input at some points only, or keep a reference to it, and the
  caller's arrays stay unchanged.
- Rows are named a column at a time (tree.entry_names), leaves are rebuilt as views
  (tree.rebuilder), the noise difference table runs in plain Python
  (stencils._difference_table_levels), and so do a line's features
  (stencils.line_features): each must equal the one-at-a-time or numpy version.
- Vectorized batches take a quarter of one core's share of the last-level cache.
- `import gradcheck_kit` leaves multiprocessing alone (a subprocess reads sys.modules).
- Group testing finds 3 wrong coordinates among 1e5 in few evaluations (fixed seed).
"""
import math
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import gradcheck_kit as gk
from gradcheck_kit import evaluate, plan, stencils, tree
from gradcheck_kit.evaluate import CostRunner


def _values(cost, params, method="central", copies=False):
    """The values of one sweep of `method` over every coordinate, serially."""
    base, layout = tree.flatten(params)
    runner = CostRunner(cost, layout, base)
    runner.edits_input = copies          # True: a fresh copy for every point
    h = np.full(base.size, 2.0 ** -12)
    where, amounts = plan.requests(method, np.arange(base.size), h)
    return runner.run(where, amounts).values


def _same_bits(a, b):
    return np.asarray(a).tobytes() == np.asarray(b).tobytes()


PARAMS = {"W": np.linspace(-1.0, 1.0, 6).reshape(2, 3), "b": np.array([0.5, -0.25])}


def smooth(p):
    return np.sum(np.sin(p["W"]) ** 2) + np.prod(p["b"]) + p["W"][1, 2] * p["b"][0]


@pytest.mark.parametrize("method", ["central", "richardson", "complex-step"])
def test_shared_buffer_gives_the_values_of_fresh_copies(method):
    fast = _values(smooth, PARAMS, method)
    slow = _values(smooth, PARAMS, method, copies=True)
    assert np.isfinite(fast).all() and _same_bits(fast, slow)


def test_cost_that_edits_its_input_at_one_point_only_gets_clean_points():
    # Edits x[0] whenever x[3] is stepped up: the points after it would start from an
    # edited buffer unless the run notices and is redone with copies.
    x = np.linspace(0.5, 2.0, 6)
    keep = x.copy()

    def sometimes_edits(v):
        value = float(np.sum(v ** 3))
        if v[3] > keep[3]:
            v[0] += 1.0
        return value

    fast = _values(sometimes_edits, x)
    slow = _values(sometimes_edits, x, copies=True)
    assert _same_bits(fast, slow)
    report = gk.compare_gradient(sometimes_edits, x, lambda v: 3 * v ** 2, method="central")
    assert report.passed
    assert np.array_equal(x, keep)


def test_cost_that_keeps_its_input_sees_each_point_unchanged():
    # A cost that caches by reference ("same x as last time?") would see the shared
    # buffer change under it: the runner notices the kept reference and copies.
    class CachesLast:
        def __init__(self):
            self.last, self.value, self.calls = None, None, 0

        def __call__(self, v):
            if self.last is not None and np.array_equal(v, self.last):
                return self.value
            self.calls += 1
            self.last, self.value = v, float(np.sum(np.exp(v)))
            return self.value

    x = np.array([0.1, -0.3, 0.7, 1.2])
    fast = _values(CachesLast(), x)
    slow = _values(lambda v: float(np.sum(np.exp(v))), x, copies=True)
    assert _same_bits(fast, slow)


def test_editing_cost_is_noted_and_the_callers_arrays_stay_unchanged():
    params = {"W": np.linspace(0.5, 1.0, 4).reshape(2, 2), "b": np.array([0.25])}
    kept = {k: v.copy() for k, v in params.items()}

    def edits(p):
        value = float(np.sum(p["W"] ** 2) + 3 * p["b"][0])
        p["W"] *= 2.0
        return value

    report = gk.compare_gradient(edits, params, lambda p: {"W": 2 * p["W"], "b": np.array([3.0])})
    assert report.passed
    assert any("modifies its input in place" in note for note in report.notes)
    assert all(np.array_equal(params[k], kept[k]) for k in params)


def test_failing_points_are_recorded_as_before():
    x = np.array([1.0, 2.0, 3.0])

    def fails_right_of_two(v):
        if v[1] > 2.0:
            raise ValueError("outside the table")
        return float(np.sum(v ** 2))

    base, layout = tree.flatten(x)
    runner = CostRunner(fails_right_of_two, layout, base)
    where, amounts = plan.requests("central", np.arange(3), np.full(3, 0.5))
    results = runner.run(where, amounts)
    assert sorted(results.failures) == [2]      # x[1] + 0.5 only
    assert np.isnan(results.values[2])
    assert results.values[[0, 1, 3, 4, 5]].tolist() == [
        float(np.sum(np.array([1.5, 2, 3]) ** 2)), float(np.sum(np.array([0.5, 2, 3]) ** 2)),
        float(np.sum(np.array([1, 1.5, 3]) ** 2)), float(np.sum(np.array([1, 2, 3.5]) ** 2)),
        float(np.sum(np.array([1, 2, 2.5]) ** 2))]


def _layouts():
    shapes = st.lists(st.tuples(st.integers(0, 3), st.integers(1, 3)).map(
        lambda t: (t[1],) * t[0]), min_size=1, max_size=4)
    return shapes.map(lambda ss: {f"p{k}": np.zeros(s) for k, s in enumerate(ss)})


@given(_layouts(), st.randoms(use_true_random=False))
@settings(max_examples=60, deadline=None)
def test_names_a_column_at_a_time_equal_names_one_at_a_time(params, random):
    _, layout = tree.flatten(params)
    flat = sorted(random.sample(range(layout.size), min(layout.size, 7)))
    few, tree.FEW_ENTRIES = tree.FEW_ENTRIES, 0     # the column path, even for 7 entries
    try:
        names, leaves, indices = tree.entry_names(layout, flat)
    finally:
        tree.FEW_ENTRIES = few
    for j, i in enumerate(flat):
        leaf, index = tree.leaf_and_index(layout, i)
        assert (names[j], leaves[j], indices[j]) == (tree.entry_name(leaf, index), leaf.name,
                                                     index)
        assert all(type(k) is int for k in indices[j])


@given(_layouts(), st.booleans())
@settings(max_examples=40, deadline=None)
def test_view_rebuilder_equals_rebuild(params, complex_values):
    vector, layout = tree.flatten(params)
    vector = vector + np.arange(vector.size)
    if complex_values:
        vector = vector + 0.5j
    fast = tree.leaves_of(tree.rebuilder(layout, complex_values)(vector))
    slow = tree.leaves_of(tree.rebuild(vector, layout))
    assert [(a.dtype, a.shape, a.tobytes()) for a in fast] == \
        [(b.dtype, b.shape, b.tobytes()) for b in slow]


def _array_difference_table(f):
    """The numpy formulation of More & Wild's difference table that
    stencils._difference_table_noise replaced (kept here as the reference)."""
    size = float(np.max(np.abs(f), initial=0.0))
    if not (np.isfinite(size) and size > 0):
        return 0.0, 0
    diffs, sigmas = np.asarray(f, dtype=float) / size, []
    for k in range(1, len(f) - 1):
        diffs = np.diff(diffs)
        gamma = math.factorial(k) ** 2 / math.factorial(2 * k)
        sigmas.append((k, math.sqrt(gamma * float(np.mean(diffs ** 2))),
                       bool(np.any(diffs > 0) and np.any(diffs < 0))))
    if all(s == 0 for _, s, _ in sigmas):
        return 0.0, 0
    for (k, s, changes), (_, s1, _), (_, s2, _) in zip(sigmas, sigmas[1:], sigmas[2:]):
        if k >= 2 and changes and s > 0 and s1 > 0 and s2 > 0 and \
                0.25 <= s / s1 <= 4 and 0.25 <= s / s2 <= 4:
            return s * size, k
    candidates = [item for item in sigmas if item[0] >= 2] or sigmas
    k, s, _ = min(candidates, key=lambda item: item[1])
    return s * size, k


@given(st.one_of(
    st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64), max_size=12),
    st.lists(st.floats(-1e6, 1e6), min_size=120, max_size=300),
    st.builds(lambda c, e, n: (c + e * np.sin(np.arange(n) * 0.7)).tolist(),
              st.floats(-1e3, 1e3), st.floats(0, 1e-10), st.integers(2, 20))))
@settings(max_examples=300, deadline=None)
def test_plain_python_difference_table_is_bitwise_the_array_version(values):
    f = np.array(values, dtype=float)
    level, order = stencils._difference_table_noise(f)
    want_level, want_order = _array_difference_table(f)
    assert order == want_order
    assert np.float64(level).tobytes() == np.float64(want_level).tobytes()


def test_import_and_a_check_do_not_start_multiprocessing():
    # The check's own modules (evaluate, pipeline, locate) must not import
    # concurrent.futures.process, which imports multiprocessing.
    code = ("import sys, numpy as np, gradcheck_kit as gk; "
            "gk.compare_gradient(lambda x: float(np.sum(x ** 2)), np.ones(2), lambda x: 2 * x); "
            "gk.locate_mismatches, gk.numeric_gradient, gk.compare_jacobian; "
            "print(sorted(m for m in sys.modules if m.startswith('multiprocessing') "
            "or m == 'concurrent.futures.process'))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


def test_process_pool_is_recognised_without_eager_import():
    from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor

    class OwnPool(ProcessPoolExecutor):
        pass

    with ThreadPoolExecutor(1) as threads:
        assert evaluate.is_thread_pool(threads) and not evaluate.is_process_pool(threads)
    pool = OwnPool(1)
    try:
        assert evaluate.is_process_pool(pool)
    finally:
        pool.shutdown()


def test_workers_come_from_a_client_that_says():
    class Client:
        def nthreads(self):
            return {"tcp://one": 2, "tcp://two": 3}

    class Silent:
        def submit(self, fn, *args):
            raise NotImplementedError

    assert evaluate.executor_workers(Client()) == 5
    assert evaluate.executor_workers(Silent()) == (evaluate.os.cpu_count() or 1)
    # 5 workers get 4 shares each; the shares cover the requests in order
    bounds = evaluate._share_bounds(100, 5)
    assert len(bounds) == 20 and bounds[0][0] == 0 and bounds[-1][1] == 100


def test_group_testing_finds_three_of_a_hundred_thousand_in_few_evaluations():
    # Hwang's count for k = 3 of n = 1e5 is about 3 log2(n / 3) = 45 probes; the
    # search reads positions off tilted probes, so it needs fewer.
    from sparse_bugs import planted

    bad = [1_234, 50_000, 99_999]
    cost, gradient, x = planted(100_000, bad, seed=4)
    report = gk.locate_mismatches(cost, x, gradient, seed=2)
    assert sorted(r.flat_index for r in report.mismatches) == bad
    assert report.extra["probes"] <= 30
    assert report.evaluations <= 70


# --- vectorized batches sized from the machine's cache --------------------------------------
def _caches(folder, entries):
    """A fake Linux sysfs cache folder: (level, type, size, shared_cpu_list) per index."""
    for k, (level, kind, size, shared) in enumerate(entries):
        index = folder / f"index{k}"
        index.mkdir()
        for name, value in (("level", level), ("type", kind), ("size", size),
                            ("shared_cpu_list", shared)):
            (index / name).write_text(f"{value}\n")
    return str(folder)


@pytest.mark.parametrize("last_level, expected", [
    ((3, "Unified", "32768K", "0-1"), 4 * 2**20),    # the test machine: a quarter of 16 MiB
    ((3, "Unified", "8192K", "0-7"), 2**20),         # 1 MiB per core would give 256 KiB: floor
    ((3, "Unified", "256M", "0"), 16 * 2**20),       # 64 MiB: capped
    ((3, "Unified", "12288K", "0,2-3"), 2**20),      # three cores share 12 MiB: 1 MiB each
    ((2, "Unified", "2048K", "0"), 2**20),           # no L3: the L2 is the last level
])
def test_batch_size_is_a_quarter_of_a_cores_share_of_the_last_level_cache(
        tmp_path, last_level, expected):
    from gradcheck_kit.evaluate import batch_bytes_from_cache
    entries = [(1, "Data", "32K", "0"), (1, "Instruction", "32K", "0")]
    if last_level[0] == 3:
        entries.append((2, "Unified", "1024K", "0"))
    folder = _caches(tmp_path, entries + [last_level])
    assert batch_bytes_from_cache(folder) == expected


def test_batch_size_falls_back_where_the_caches_are_not_described(tmp_path):
    from gradcheck_kit.evaluate import FALLBACK_BATCH_BYTES, batch_bytes_from_cache
    assert batch_bytes_from_cache(str(tmp_path / "missing")) == FALLBACK_BATCH_BYTES
    assert batch_bytes_from_cache(str(tmp_path)) == FALLBACK_BATCH_BYTES      # empty
    (tmp_path / "broken").mkdir()
    broken = _caches(tmp_path / "broken", [(3, "Unified", "lots", "0-1")])
    assert batch_bytes_from_cache(broken) == FALLBACK_BATCH_BYTES
    (tmp_path / "empty").mkdir()
    empty = _caches(tmp_path / "empty", [(3, "Unified", "", "")])
    assert batch_bytes_from_cache(empty) == FALLBACK_BATCH_BYTES


def test_vectorized_runs_take_the_cache_size_unless_a_size_is_set(monkeypatch):
    from gradcheck_kit import evaluate
    from gradcheck_kit.tree import flatten
    n = 40
    base, layout = flatten(np.linspace(0.1, 1.0, n))
    seen = []

    def batched(x):
        seen.append(x.shape[0])
        return np.sum(x * x, axis=1)

    monkeypatch.setattr(evaluate, "batch_bytes_from_cache", lambda: 6 * n * 8)
    evaluate.CostRunner(batched, layout, base, vectorized=True).run(
        list(range(n)) * 2, [1e-3] * (2 * n))
    assert max(seen) == 6 and sum(seen) == 2 * n
    seen.clear()
    monkeypatch.setattr(evaluate, "DEFAULT_BATCH_BYTES", 10 * n * 8)
    evaluate.CostRunner(batched, layout, base, vectorized=True).run(
        list(range(n)) * 2, [1e-3] * (2 * n))
    assert max(seen) == 10


def _numpy_line_features(values, t, spread):
    """stencils.line_features as it was written with numpy (the reference)."""
    f = np.asarray(values, dtype=float)
    mid, half = len(f) // 2, (len(f) // 2) * t
    g = stencils.smooth_side(f)
    noise, order = stencils._noise_of_side(g.tolist())
    m = (len(g) - 1) // 2
    second = max(0.0, abs(g[2 * m] - 2 * g[m] + g[0]) - 4 * noise)
    slope = max(0.0, float(np.max(np.abs(f - f[mid]))) - 3 * noise)
    third = max(0.0, float(np.max(np.abs(np.diff(g, 3)), initial=0.0)) - 8 * noise)
    lone = len(g) < len(f) and \
        not stencils._slope_changes(f.tolist(), stencils._kink_point(f.tolist()) - 1)
    return (noise, order, second / (m * t) ** 2 / spread, slope / half, third / t ** 3,
            stencils.table_settles(g.tolist(), noise), lone)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=9, max_size=9),
       st.sampled_from([0.0, 1e-9, 1e-3]), st.integers(0, 8), st.floats(-5, 5))
def test_line_features_in_plain_python_are_bitwise_the_numpy_version(noise, size, at, jump):
    # smooth values, a little noise, and sometimes a kink or one value off the line
    line = [1.5 + 0.3 * j + 0.02 * j * j + size * e for j, e in zip(range(-4, 5), noise)]
    line[at] += jump * size
    if jump > 4:
        line = [v + 0.7 * max(0, j - at) for j, v in enumerate(line)]
    got = stencils.line_features(line, 2.0 ** -20, 3.0)
    assert (got.noise, got.order, got.curvature_s2, got.slope, got.third, got.settled,
            got.lone_value) == _numpy_line_features(line, 2.0 ** -20, 3.0)
    assert stencils.looks_quantized(line) == _numpy_looks_quantized(line)


def _numpy_looks_quantized(values):
    """looks_quantized without its plain-Python first test."""
    d = np.diff(np.asarray(values, dtype=float))
    zero = d == 0
    if not zero.any() or zero.all():
        return False
    return stencils.looks_quantized(values)


def test_verdicts_share_one_string_object_per_verdict():
    # np.full(..., "disagree", dtype=object) boxes a new str per row under numpy 2 (7
    # parameter vectors at n = 1e5); the rows must share one object per verdict.
    from gradcheck_kit import verdicts
    a = np.array([1.0, 2.0, 3.0, 4.0, np.nan])
    n = np.array([1.0, 2.5, 3.0, 5.0, 1.0])
    v = verdicts.decide(a, n, np.full(5, 0.1), np.zeros(5, dtype=bool))
    assert list(v) == ["agree", "disagree", "agree", "disagree", "non-finite"]
    assert v[1] is v[3] and v[0] is v[2]
