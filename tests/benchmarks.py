"""Benchmarks, run by hand:  python tests/benchmarks.py [--quick] [SECTION ...]

Each prints times measured side by side in one run and their ratio; each time is the best
of a few repeats, since these machines are shared and noisy.  Targets (from the issue
tracker): tool within 1.3x of a bare loop; vectorized at least 10x faster than the loop;
a 2-process pool at least 1.6x faster than serial on a cost of about 40 ms; group testing
far below the 2n evaluations of a full central sweep.

The `table` section prints the rows of the performance issue's table: each ratio from
runs alternated in one process, the median of at least 5 (before/after where the old
way can still be run: fresh copies per point, the numpy difference table, 4 MiB
batches).  Sections: table, overhead, pool, groups (default: all); --quick uses
n = 2e4 instead of 1e5 for the serial and memory rows.
"""
import contextlib
import gc
import os
import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc
from concurrent.futures import ProcessPoolExecutor

import numpy as np

import gradcheck_kit as gk
from sparse_bugs import planted  # tests/ is on sys.path when run as a script

REPEATS = 5


def best_of(fn, repeats=REPEATS):
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


# --- 1 and 2: overhead against a bare loop, and the vectorized path -------------------------
N = 2000
RNG = np.random.default_rng(0)
WEIGHTS = RNG.uniform(0.5, 2.0, N)
X0 = RNG.normal(size=N)


def cheap_cost(x):
    return float(np.dot(WEIGHTS, np.cos(x)))


def cheap_batched(x):
    return np.cos(x) @ WEIGHTS


# Layered models with n = 2000 or so: many small numpy calls per point, the kind of cost
# whose single calls are mostly interpreter overhead.
def layered(layers, width, seed=3):
    rng = np.random.default_rng(seed)
    inp = rng.normal(size=width)
    x = 0.4 * rng.normal(size=layers * width * width)

    def one(w):
        a = inp
        for k in range(layers):
            a = np.tanh(w[k * width ** 2:(k + 1) * width ** 2].reshape(width, width) @ a)
        return float(a @ a)

    def batch(w):
        stacked = w.reshape(w.shape[0], layers, width, width)
        a = np.broadcast_to(inp, (w.shape[0], width))
        for k in range(layers):
            a = np.tanh(np.einsum("bij,bj->bi", stacked[:, k], a))
        return np.einsum("bi,bi->b", a, a)
    return one, batch, x


# Least-squares losses on data rows: a batch turns matrix-vector into matrix-matrix work.
def least_squares(rows):
    data = RNG.normal(size=(rows, N)) / np.sqrt(N)
    target = RNG.normal(size=rows)

    def one(w):
        r = data @ w - target
        return float(r @ r)

    def batch(w):
        r = w @ data.T - target
        return np.einsum("ij,ij->i", r, r)
    return one, batch


def bare_loop(cost, x0, h=2.0 ** -19):
    x = x0.copy()
    g = np.empty(x.size)
    for i in range(x.size):
        xi = x[i]
        x[i] = xi + h
        fp = cost(x)
        x[i] = xi - h
        fm = cost(x)
        x[i] = xi
        g[i] = (fp - fm) / (2 * h)
    return g


def overhead():
    loop = best_of(lambda: bare_loop(cheap_cost, X0))
    tool = best_of(lambda: gk.numeric_gradient(cheap_cost, X0, method="central"))
    close = np.max(np.abs(gk.numeric_gradient(cheap_cost, X0, method="central")
                          - bare_loop(cheap_cost, X0)))
    print(f"[overhead] n={N}, central, {2 * N} evaluations of a cheap cost (w . cos x)")
    print(f"  bare loop {loop * 1e3:8.1f} ms   numeric_gradient {tool * 1e3:8.1f} ms   "
          f"ratio tool/loop = {tool / loop:.2f}  (target <= 1.3; largest difference "
          f"{close:.1e})")
    print(f"[vectorized] n~{N}, the same 2n points in batches of "
          f"{gk.evaluate.default_batch_bytes() >> 20} MiB, against the bare loop")
    cases = [("w . cos x", cheap_cost, cheap_batched, X0),
             ("tanh model, 20 x (10x10)", *layered(20, 10)),
             ("tanh model, 40 x (7x7)", *layered(40, 7))]
    for rows in (256, 1024):
        cases.append((f"least squares, {rows} rows", *least_squares(rows), X0))
    for name, one, batch, x in cases:
        loop = best_of(lambda one=one, x=x: bare_loop(one, x), 3)
        batched = best_of(lambda batch=batch, x=x: gk.numeric_gradient(
            batch, x, method="central", vectorized=True), 3)
        print(f"  {name:25s} loop {loop * 1e3:7.1f} ms   vectorized {batched * 1e3:7.1f} ms   "
              f"speed-up = {loop / batched:.1f}x  (target >= 10x)")


# --- 3: process pool against serial on a slow cost ----------------------------------------------
def slow_cost(x):
    """About 40 ms of single-threaded Python work, then a smooth function of x."""
    total = 0.0
    for k in range(1_200_000):
        total += k % 7
    return float(np.sum(np.sin(x) * np.arange(1, x.size + 1))) + 0.0 * total


def slow_grad(x):
    return np.cos(x) * np.arange(1, x.size + 1)


def pool():
    x = np.linspace(-1, 1, 10)
    one = time.perf_counter()
    slow_cost(x)
    per_call = time.perf_counter() - one
    t = time.perf_counter()
    serial = gk.compare_gradient(slow_cost, x, slow_grad, method="central")
    t_serial = time.perf_counter() - t
    with ProcessPoolExecutor(2) as executor:
        gk.compare_gradient(slow_cost, x[:1], slow_grad, method="central", executor=executor)
        t = time.perf_counter()
        parallel = gk.compare_gradient(slow_cost, x, slow_grad, method="central",
                                       executor=executor)
        t_pool = time.perf_counter() - t
    same = [(r.name, r.verdict) for r in serial.rows] == [(r.name, r.verdict) for r in
                                                          parallel.rows]
    print(f"[pool] cost of {per_call * 1e3:.0f} ms, {serial.evaluations} evaluations")
    print(f"  serial {t_serial:6.2f} s   2-process pool {t_pool:6.2f} s   speed-up = "
          f"{t_serial / t_pool:.2f}x (target >= 1.6x; identical verdicts: {same})")


# --- 4: group testing against a full sweep ----------------------------------------------------
def group_testing():
    n = 1_000_000
    bad = [123_456, 500_000, 999_999]
    big_cost, big_grad, x = planted(n, bad, seed=1)
    tracemalloc.start()
    t = time.perf_counter()
    report = gk.locate_mismatches(big_cost, x, big_grad, seed=2)
    seconds = time.perf_counter() - t
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    found = sorted(r.flat_index for r in report.mismatches)
    print(f"[group testing] n={n:,}, 3 coordinates 5% wrong")
    print(f"  found {found} (exact: {found == bad}), passed={report.passed}, "
          f"{report.extra['probes']} probes, {report.evaluations} evaluations in {seconds:.1f} s")
    print(f"  evaluations / full central sweep (2n) = {report.evaluations / (2 * n):.2e}  "
          f"(target <= 80 evaluations); peak memory {peak / 2**20:.0f} MiB = "
          f"{peak / (8 * n):.1f} vectors of n floats")


# --- the rows of the performance issue's table -----------------------------------------------
def alternated(fns: dict, repeats=5) -> dict:
    """Median seconds of each function, the functions run in turn, `repeats` rounds."""
    times = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            gc.collect()
            t = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - t)
    return {name: statistics.median(ts) for name, ts in times.items()}


@contextlib.contextmanager
def fresh_copies():
    """The former serial path: a fresh copy of the base point for every evaluation."""
    from gradcheck_kit import evaluate
    shared = evaluate._serial_pass

    def copies(cost, layout, base, where, amounts, start, bar, stop, reuse):
        return shared(cost, layout, base, where, amounts, start, bar, stop, False)
    evaluate._serial_pass = copies
    try:
        yield
    finally:
        evaluate._serial_pass = shared


@contextlib.contextmanager
def array_difference_table():
    """The former numpy difference table (its reference copy in the invariants test)."""
    from gradcheck_kit import stencils
    from test_performance_invariants import _array_difference_table
    plain = stencils._difference_table_noise
    stencils._difference_table_noise = _array_difference_table
    try:
        yield
    finally:
        stencils._difference_table_noise = plain


def _few_entries(n):
    """A cost that reads four entries (a few microseconds a call) and its gradient."""
    k = n // 2

    def cost(v):
        head = v[:4]
        return v[0] * v[1] + np.sin(v[k]) + v[n - 1] ** 2 + np.sum(head * head) + 0.5 * v[2]

    def gradient(v):
        g = np.zeros(n)
        g[:4] = 2 * v[:4]
        g[0] += v[1]
        g[1] += v[0]
        g[2] += 0.5
        g[k] += np.cos(v[k])
        g[n - 1] += 2 * v[n - 1]
        return g
    return cost, gradient


def bare_central(cost, x, h=2.0 ** -19):
    """Central differences shifting one entry of one array in place."""
    v = x.copy()
    g = np.empty(x.size)
    for i in range(x.size):
        xi = v[i]
        v[i] = xi + h
        fp = cost(v)
        v[i] = xi - h
        fm = cost(v)
        v[i] = xi
        g[i] = (fp - fm) / (2 * h)
    return g


def bare_complex(cost, x, h=1e-20):
    """The complex step shifting one entry of one complex array in place."""
    v = x.astype(complex)
    g = np.empty(x.size)
    for i in range(x.size):
        xi = v[i]
        v[i] = xi + 1j * h
        g[i] = cost(v).imag / h
        v[i] = xi
    return g


def serial_rows(n):
    x = np.random.default_rng(1).normal(size=n)
    cost, gradient = _few_entries(n)
    one = time.perf_counter()
    for _ in range(1000):
        cost(x)
    per_call = (time.perf_counter() - one) / 1000
    print(f"[serial, few entries read] n={n:,}, cost about {per_call * 1e6:.1f} us a call; "
          "medians of 5 alternated runs")

    def old(method):
        def run():
            with fresh_copies():
                gk.compare_gradient(cost, x, gradient, method=method)
        return run
    def new(method):
        return lambda: gk.compare_gradient(cost, x, gradient, method=method)
    for method, bare, target in (("central", bare_central, 1.5),
                                 ("complex-step", bare_complex, 2.5)):
        t = alternated({"loop": lambda bare=bare: bare(cost, x), "tool": new(method),
                        "before": old(method)})
        print(f"  {method:12s} tool / bare loop = {t['tool'] / t['loop']:.2f}x (target <= "
              f"{target}x; with a fresh copy per point, as before: "
              f"{t['before'] / t['loop']:.2f}x)")


def memory_row(n):
    x = np.random.default_rng(1).normal(size=n)
    cost, gradient = _few_entries(n)
    # One small check first: what the first check of a session imports and caches once
    # (about 2.6 MB, 3.5 vectors at n = 1e5) is not the check's own memory.
    small, small_gradient = _few_entries(16)
    gk.compare_gradient(small, np.ones(16), small_gradient, method="central")
    gc.collect()
    tracemalloc.start()
    report = gk.compare_gradient(cost, x, gradient, method="central")
    gc.collect()
    kept, peak = tracemalloc.get_traced_memory()
    checked = report.checked          # read from the columns: no Row object built yet
    rows = report.rows                # builds (and keeps) one Row object per coordinate
    with_rows = tracemalloc.get_traced_memory()[0]
    tracemalloc.stop()
    vector = 8 * n
    print(f"[memory] full central check, n={n:,}: peak {peak / vector:.1f} parameter vectors "
          f"(target <= 30), the report keeps {kept / vector:.1f} (target <= 20; "
          f"{checked:,} rows as columns; {with_rows / vector:.1f} once its {len(rows):,} Row "
          "objects are built)")


def tiny_row():
    x = np.array([0.3, -1.2, 2.0])

    def cost(v):           # about a microsecond
        return v[0] * v[1] + v[2] * v[2]

    def gradient(v):
        return np.array([v[1], v[0], 2 * v[2]])

    expected = gradient(x)

    def loop():
        np.allclose(bare_central(cost, x), expected)

    def before():
        with array_difference_table():
            gk.compare_gradient(cost, x, gradient)
    for _ in range(20):
        gk.compare_gradient(cost, x, gradient)

    def tool():
        for _ in range(20):
            gk.compare_gradient(cost, x, gradient)

    def old():
        for _ in range(20):
            before()

    def bare():
        for _ in range(20):
            loop()
    t = alternated({"loop": bare, "tool": tool, "before": old}, repeats=7)
    print(f"[tiny check] n=3, 1 us cost, method auto: {t['tool'] / 20 * 1e3:.2f} ms = "
          f"{t['tool'] / t['loop']:.1f}x a bare central loop plus allclose (target <= 12x; "
          f"with the numpy difference table: {t['before'] / t['loop']:.1f}x)")


def plugin_row():
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "test_empty.py")
        with open(path, "w") as f:
            f.write("")

        def session(*extra):
            return lambda: subprocess.run([sys.executable, "-m", "pytest", "-q", "-p",
                                           "no:cacheprovider", *extra, path], cwd=folder,
                                          capture_output=True)
        t = alternated({"with": session(), "without": session("-p", "no:gradcheck_kit")})
    print(f"[pytest, empty test file] with the plugin / with -p no:gradcheck_kit = "
          f"{t['with'] / t['without']:.2f}x (target <= 1.05x; {t['without'] * 1e3:.0f} ms "
          "without)")
    done = subprocess.run([sys.executable, "-X", "importtime", "-c", "import gradcheck_kit"],
                          capture_output=True, text=True)
    total = [line for line in done.stderr.splitlines() if line.endswith("| gradcheck_kit")]
    heavy = [line.split("|")[-1].strip() for line in done.stderr.splitlines()
             if line.split("|")[-1].strip() in ("multiprocessing", "concurrent.futures.process")]
    if total:
        micros = int(total[-1].split("|")[1])
        print(f"  import gradcheck_kit: {micros / 1e3:.0f} ms cumulative; imports "
              f"{', '.join(heavy) or 'no multiprocessing'}")


def batch_row():
    from gradcheck_kit import evaluate
    default, previous = evaluate.default_batch_bytes(), evaluate.DEFAULT_BATCH_BYTES
    print(f"[vectorized batches] time with batches of 256 KiB, 1 MiB, 4 MiB and 16 MiB / with "
          f"the size from this machine's cache, {default >> 10} KiB (> 1: the cache's size is "
          "faster)")
    tanh_one, tanh_batch, tanh_x = layered(20, 10)
    cases = [("w . cos x", cheap_batched, X0), ("tanh model, 20 x (10x10)", tanh_batch, tanh_x),
             ("least squares, 256 rows", least_squares(256)[1], X0)]
    sizes = sorted({2**18, 2**20, 2**22, default, 2**24})
    for name, batch, x in cases:
        def run(size, batch=batch, x=x):
            def go():
                evaluate.DEFAULT_BATCH_BYTES = size
                try:
                    gk.numeric_gradient(batch, x, method="central", vectorized=True)
                finally:
                    evaluate.DEFAULT_BATCH_BYTES = previous
            return go
        t = alternated({size: run(size) for size in sizes})
        ratios = "  ".join(f"{size >> 10} KiB {t[size] / t[default]:.2f}x" for size in sizes
                           if size != default)
        print(f"  {name:25s} {ratios}")


def table(quick=False):
    n = 20_000 if quick else 100_000
    serial_rows(n)
    memory_row(n)
    tiny_row()
    plugin_row()
    batch_row()


if __name__ == "__main__":
    args = sys.argv[1:]
    quick = "--quick" in args
    chosen = [a for a in args if not a.startswith("--")] or ["table", "overhead", "pool",
                                                              "groups"]
    if "table" in chosen:
        table(quick)
    if "overhead" in chosen:
        overhead()
    if "pool" in chosen:
        pool()
    if "groups" in chosen:
        group_testing()
