"""Stage 3, evaluate: calling the cost near the base point.

A request is "base + amount * direction", where the direction is a coordinate
number (a unit vector) or a dense vector.  Requests run serially, as batched
calls of a vectorized cost, or on any concurrent.futures.Executor, always in
request order.  The caller's arrays are never touched: the points live in a buffer
of the runner's own, shifted at one entry before each call and set back after it
(O(1) per point, not a copy of all n values), and a cost seen to edit or keep its
input gets a fresh copy per call instead.  A point where the cost raises or returns
a non-scalar is recorded as a failure for that point alone, not for the whole check.
"""
from __future__ import annotations

import functools
import math
import os
import pickle
import sys
import threading
import time
import warnings
from concurrent.futures import BrokenExecutor, CancelledError, Future
from dataclasses import dataclass, field

import numpy as np

from .errors import CheckInputError, CheckInterrupted, ExecutorError
from .plan import check_executor
from .tree import Layout, coordinate_name, flatten, rebuild, rebuilder

# Memory of one batch of a vectorized cost: None sizes it from the machine's cache
# (batch_bytes_from_cache); a number of bytes fixes it (a cost with a large fixed cost per
# call, a compiled or accelerator kernel, may want bigger batches).  Read at run time.
DEFAULT_BATCH_BYTES = None
DEFAULT_CHUNK_BYTES = None       # the former name of DEFAULT_BATCH_BYTES, still read
# Measured on a 2-core machine (1 MiB of L2 per core, 32 MiB of L3 shared; tests/
# benchmarks.py): 4 MiB batches ran costs of many small operations per batch 1.1-2.4x
# faster than batches of 256 KiB - 1 MiB (their per-call overhead grows with the number
# of batches) and 1.0-1.14x faster than 16 MiB ones (which leave the cache); an
# elementwise cost ran the same at every size in one run and 1.45x faster at 256 KiB in
# another, on this shared machine.  So a batch takes a quarter of one core's share of
# the last-level cache (room for the cost's temporaries of the batch's size beside it):
# 4 MiB there.  Where the machine does not say, 4 MiB.
CACHE_SHARE = 0.25
FALLBACK_BATCH_BYTES = 4 * 2**20
SMALLEST_BATCH_BYTES = 2**20
LARGEST_BATCH_BYTES = 16 * 2**20
CPU_CACHES = "/sys/devices/system/cpu/cpu0/cache"    # Linux; other systems take the fallback


@functools.lru_cache(maxsize=None)
def batch_bytes_from_cache(folder: str = CPU_CACHES) -> int:
    """A quarter of one core's share of the last-level data cache, within 1 - 16 MiB;
    FALLBACK_BATCH_BYTES where the system does not describe its caches (read once).

    Examples
    --------
    >>> batch_bytes_from_cache("/no/such/folder") == FALLBACK_BATCH_BYTES
    True
    """
    try:
        caches = [_cache_entry(os.path.join(folder, name)) for name in os.listdir(folder)
                  if name.startswith("index")]
    except (OSError, ValueError, IndexError, KeyError):   # unreadable or unexpected text
        return FALLBACK_BATCH_BYTES
    caches = [c for c in caches if c is not None]
    if not caches:
        return FALLBACK_BATCH_BYTES
    _, size, sharing = max(caches)
    share = int(CACHE_SHARE * size / max(sharing, 1))
    return min(max(share, SMALLEST_BATCH_BYTES), LARGEST_BATCH_BYTES)


def _cache_entry(folder: str):
    """(level, bytes, cpus sharing it) of one cache in Linux's sysfs, None for an
    instruction cache."""
    def read(name):
        with open(os.path.join(folder, name)) as f:
            return f.read().strip()
    if read("type") == "Instruction":
        return None
    size = read("size")
    units = {"K": 2**10, "M": 2**20, "G": 2**30}
    number = int(size[:-1]) * units[size[-1]] if size[-1] in units else int(size)
    cpus = 0
    for part in read("shared_cpu_list").split(","):
        lo, _, hi = part.partition("-")
        cpus += int(hi or lo) - int(lo) + 1
    return int(read("level")), number, cpus


def default_batch_bytes() -> int:
    """DEFAULT_BATCH_BYTES where it is set, else the size from the machine's cache."""
    return DEFAULT_BATCH_BYTES or DEFAULT_CHUNK_BYTES or batch_bytes_from_cache()


PROGRESS_AFTER_SECONDS = 2.0       # show a bar when the run looks longer than this


class NotScalarError(ValueError):
    """The cost returned something that is not one number."""


class NotComplexSafeError(TypeError):
    """The cost dropped the imaginary part of a complex-step point."""


class ExecutorFailure(Exception):
    """A point the executor could not evaluate (its share raised on the way there or
    back, e.g. a serialisation error): recorded for those points, like a cost's error,
    but the message says it was the executor."""


def describe_failure(exc: BaseException) -> str:
    """How a failed point reads in a row: the cost's exception, or the executor's failure.

    Examples
    --------
    >>> describe_failure(ZeroDivisionError("division by zero"))
    'cost raised ZeroDivisionError: division by zero'
    >>> describe_failure(ExecutorFailure("the pool could not evaluate this point"))
    'the pool could not evaluate this point'
    """
    if isinstance(exc, ExecutorFailure):
        return str(exc)
    return f"cost raised {type(exc).__name__}: {exc}"


NOT_COMPLEX_SAFE = ("the cost returned a real value at a complex point: it drops the imaginary "
                    "part, so the complex step cannot be used (use method='richardson')")


@dataclass
class Results:
    values: np.ndarray                              # one per request; NaN where it failed
    failures: dict = field(default_factory=dict)   # request number -> exception
    # The run stopped early (Ctrl-C, or a failed executor): values not reached are NaN.
    interrupted: bool = False


def as_scalar(y):
    """The cost's value as a Python float or complex; NotScalarError otherwise."""
    if isinstance(y, (float, complex)):   # float, complex and numpy's 64-bit kinds: fast
        return y
    a = np.asarray(y)
    if a.size != 1:
        raise NotScalarError(f"the cost returned an array of shape {a.shape}; expected one "
                             "number (return a scalar, e.g. with .sum())")
    if not (np.issubdtype(a.dtype, np.number) or a.dtype == np.bool_):
        raise NotScalarError(f"the cost returned {type(y).__name__}; expected a number (a "
                             "scalar)")
    return a.reshape(()).item()


def _missing(m: int, dtype) -> np.ndarray:
    """Placeholders for values not computed: NaN in the real and the imaginary part,
    so a failed complex-step point cannot pass for a zero derivative."""
    fill = complex(np.nan, np.nan) if np.dtype(dtype).kind == "c" else np.nan
    return np.full(m, fill, dtype=dtype)


def _is_coordinate(where) -> bool:
    """A request's direction is a coordinate number (else a dense vector or None)."""
    return type(where) is int or isinstance(where, np.integer)


def _value_dtype(amounts):
    """complex128 for complex-step requests, float64 otherwise (all requests alike)."""
    return np.complex128 if len(amounts) and isinstance(amounts[0], complex) else np.float64


def _point(base: np.ndarray, where, amount) -> np.ndarray:
    """A fresh copy of the point base + amount * where (for costs that edit or keep
    their input; the others share one buffer, see `_serial_pass`)."""
    v = base.astype(np.complex128) if isinstance(amount, complex) else base.copy()
    if _is_coordinate(where):
        v[where] += amount
    elif where is not None:
        v += amount * where
    return v


def _only_coordinates(where) -> bool:
    """Every request's direction is a coordinate number (an int array, or a list of ints)."""
    if isinstance(where, np.ndarray):
        return where.dtype.kind in "iu"
    return all(_is_coordinate(w) for w in where)


# Serial requests are turned into Python lists this many at a time: indexing a list
# with Python ints is the fast path, and a whole list of 2n ints would cost memory.
LIST_CHUNK = 4096


def _chunks(where, amounts):
    """(k0, where list, amounts list) pieces of the requests, in order."""
    m = len(amounts)
    for lo in range(0, m, LIST_CHUNK):
        hi = min(m, lo + LIST_CHUNK)
        w, a = where[lo:hi], amounts[lo:hi]
        yield lo, (w.tolist() if isinstance(w, np.ndarray) else list(w)), \
            (a.tolist() if isinstance(a, np.ndarray) else list(a))


def _same_values(a, b) -> bool:
    """np.array_equal(a, b, equal_nan=True), with a quick exact comparison first: the
    buffer almost always holds the base exactly, and the NaN-aware test costs more than a
    small check's evaluations."""
    return bool((a == b).all()) or bool(np.array_equal(a, b, equal_nan=True))


def _kept_point_changed(buffer, base, where, amount) -> bool:
    """A cost kept the shared buffer: did it change it before it was let go?"""
    return not np.array_equal(buffer, _point(base, where, amount), equal_nan=True)


def _run_serial(cost, layout, base, where, amounts, start, bar, stop=None, reuse=True):
    """Evaluate requests one by one; returns (values, failures, interrupted).

    The whole loop sits inside the KeyboardInterrupt handler, so a Ctrl-C that lands
    between two calls (not only inside the cost) still returns what was finished.
    `stop`, a threading.Event shared with the caller, ends the loop early: the main
    thread sets it when a thread pool's share is no longer wanted.  `reuse`: the
    points may share one buffer; a run whose buffer the cost changed
    is done again with copies (see _serial_pass).
    """
    values, failures, interrupted, intact = _serial_pass(cost, layout, base, where, amounts,
                                                        start, bar, stop, reuse)
    if not intact and not interrupted:
        if bar is not None:
            bar.reset()
        values, failures, interrupted, _ = _serial_pass(cost, layout, base, where, amounts,
                                                        start, bar, stop, False)
    return values, failures, interrupted


def _serial_pass(cost, layout, base, where, amounts, start, bar, stop, reuse):
    """One pass of `_run_serial`: (values, failures, interrupted, points intact).

    With `reuse`, the points live in one buffer: a coordinate request shifts one entry
    before the call and sets it back after (O(1) per point, where a fresh copy of the
    base costs O(n): half of the time of a check at n = 1e5).  Safe only for a cost
    that neither edits nor keeps its input: editing costs (seen at the base point) get
    copies (reuse False); a cost seen keeping a reference (the buffer's reference count
    grew during the call, e.g. a cache of the last point) is left the buffer as it saw
    it and gets copies from then on; and a buffer that no longer holds the base at the
    end (a cost that edits its input at some points only) makes the caller redo the run
    with copies.
    """
    m = len(amounts)
    dtype = _value_dtype(amounts)
    values = _missing(m, dtype)
    failures = {}
    is_complex = dtype == np.complex128
    build = rebuilder(layout, complex_values=is_complex)
    shared = base.astype(dtype) if reuse else None      # the runner's own copy
    references = sys.getrefcount(shared) if reuse else 0
    spoiled = False
    try:
        for lo, where_k, amounts_k in _chunks(where, amounts):
            for k, (w, amount) in enumerate(zip(where_k, amounts_k), lo):
                if stop is not None and stop.is_set():
                    return values, failures, True, True
                coordinate = type(w) is int or isinstance(w, np.integer)
                if shared is None:
                    v = _point(base, w, amount)
                elif coordinate:
                    shared[w] += amount
                    v = shared
                else:
                    if w is not None:
                        np.add(base, amount * w, out=shared)
                    v = shared
                try:
                    y = as_scalar(cost(build(v)))
                    if is_complex and not isinstance(y, complex):
                        raise NotComplexSafeError(NOT_COMPLEX_SAFE)
                    values[k] = y
                except KeyboardInterrupt:
                    raise
                except Exception as exc:  # noqa: BLE001 - any failure of user code is data here
                    failures[start + k] = exc
                    del exc
                del v
                if shared is not None:
                    if sys.getrefcount(shared) > references:
                        # Kept by the cost (or a stored exception's traceback): leave it
                        # as the cost saw it; fresh copies from now on.
                        spoiled = _kept_point_changed(shared, base, w, amount)
                        shared = None
                    elif coordinate:
                        shared[w] = base[w]
                    elif w is not None:
                        shared[:] = base
                if bar is not None:
                    bar.update(1)
    except KeyboardInterrupt:
        if stop is not None:
            stop.set()     # the other threads' shares stop too
        return values, failures, True, True
    intact = not spoiled if shared is None else _same_values(shared, base)
    return values, failures, False, intact


def _run_share(cost, layout, base, where, amounts, start, reuse=True, stop=None):
    """Worker-side evaluation of one executor share (picklable: module-level, plain
    arguments); returns (values, failures, interrupted)."""
    return _run_serial(cost, layout, base, where, amounts, start, None, stop, reuse)


class _Batches:
    """The points of successive batches as rows of one buffer.

    Coordinate shifts touch one entry per row, so a buffer kept full of the base
    point is shifted before the call and set back after it: O(rows) work per batch
    instead of a fresh copy of every row (which, at n = 2000, cost a quarter of the
    whole run).  Only for costs seen not to edit their input; others get fresh rows.
    """

    def __init__(self, base, rows, dtype, reuse):
        self.base, self.reuse = base, reuse
        self.buffer = np.empty((rows, base.size), dtype=dtype)
        self.buffer[:] = base
        self.undo = None

    def rows(self, where, amounts) -> np.ndarray:
        k = len(amounts)
        if not (self.reuse and _only_coordinates(where)):
            batch = np.empty((k, self.base.size), dtype=self.buffer.dtype)
            for r, w in enumerate(where):
                batch[r] = _point(self.base, w, amounts[r])
            return batch
        cols = np.asarray(where, dtype=int)
        rows = np.arange(k)
        self.buffer[rows, cols] += np.asarray(amounts)
        self.undo = (rows, cols)
        return self.buffer[:k]

    def restore(self) -> None:
        if self.undo is not None:
            rows, cols = self.undo
            self.buffer[rows, cols] = self.base[cols]
            self.undo = None


def _run_vectorized(cost, layout, base, where, amounts, batch_bytes, bar, reuse=True):
    """Batched calls of a vectorized cost; returns (values, failures, interrupted)."""
    m = len(amounts)
    dtype = _value_dtype(amounts)
    is_complex = dtype == np.complex128
    row_bytes = base.size * np.dtype(dtype).itemsize
    per_batch = max(1, int(batch_bytes // max(row_bytes, 1)))
    values = _missing(m, dtype)
    failures = {}
    batches = _Batches(base, min(per_batch, max(m, 1)), values.dtype, reuse)
    try:
        for lo in range(0, m, per_batch):
            hi = min(m, lo + per_batch)
            batch = batches.rows(where[lo:hi], amounts[lo:hi])
            try:
                out = np.asarray(cost(rebuild(batch, layout, batched=True)))
                check_batch_shape(out, hi - lo)
                if is_complex and not np.iscomplexobj(out):
                    raise NotComplexSafeError(NOT_COMPLEX_SAFE)
                values[lo:hi] = out.reshape(-1)
            except KeyboardInterrupt:
                raise
            except Exception as exc:  # noqa: BLE001
                for k in range(lo, hi):
                    failures[k] = exc
            finally:
                batches.restore()
            if bar is not None:
                bar.update(hi - lo)
    except KeyboardInterrupt:
        return values, failures, True
    return values, failures, False


def check_batch_shape(out: np.ndarray, rows: int) -> None:
    """A vectorized cost returns one value per batch row: shape (rows,) or (rows, 1).

    Raises
    ------
    NotScalarError
        Saying the shape expected and the shape that came back.

    Examples
    --------
    >>> check_batch_shape(np.zeros(3), 3)
    >>> try:
    ...     check_batch_shape(np.zeros((3, 2)), 3)
    ... except NotScalarError as exc:
    ...     print(str(exc)[:65])
    the vectorized cost returned shape (3, 2) for a batch of 3 points
    """
    if out.shape in ((rows,), (rows, 1)):
        return
    points = "1 point" if rows == 1 else f"{rows} points"
    raise NotScalarError(
        f"the vectorized cost returned shape {out.shape} for a batch of {points}; expected "
        f"shape ({rows},), one value per batch row (sum over every axis but the leading "
        "batch axis, e.g. y.reshape(len(y), -1).sum(axis=1))")


def _pool_class(module: str, name: str):
    """The class `name` of concurrent.futures.<module> if that module was imported, else
    None: an executor of that class cannot exist before its module is imported, so the
    checks below need not import multiprocessing (as concurrent.futures.process does)."""
    loaded = sys.modules.get(f"concurrent.futures.{module}")
    return getattr(loaded, name, None)


def is_process_pool(executor) -> bool:
    """The executor is a concurrent.futures.ProcessPoolExecutor (a subclass too), found
    without importing multiprocessing.

    Examples
    --------
    >>> is_process_pool(None)
    False
    """
    cls = _pool_class("process", "ProcessPoolExecutor")
    return cls is not None and isinstance(executor, cls)


def is_thread_pool(executor) -> bool:
    """The executor is a concurrent.futures.ThreadPoolExecutor (a subclass too).

    Examples
    --------
    >>> is_thread_pool(None)
    False
    """
    cls = _pool_class("thread", "ThreadPoolExecutor")
    return cls is not None and isinstance(executor, cls)


def _check_picklable(cost, executor):
    if not is_process_pool(executor):
        return
    try:
        pickle.dumps(cost)
    except Exception as exc:  # noqa: BLE001
        raise CheckInputError(
            "executor: a process pool must pickle the cost, and this one cannot be pickled "
            f"({type(exc).__name__}: {exc}). Define the cost at module level (not a lambda or a "
            "closure), or pass a ThreadPoolExecutor, or a Dask client's get_executor(), which "
            "uses cloudpickle") from exc


def _run_shipped_share(blob, layout, base, where, amounts, start, reuse=True):
    """Worker side of a cost sent as cloudpickle bytes (see _shipped)."""
    import cloudpickle

    return _run_share(cloudpickle.loads(blob), layout, base, where, amounts, start, reuse)


def _shipped(cost, executor):
    """(worker function, cost payload) for an executor.

    Threads share the cost; a process pool gets it through the standard pickle (a
    cost it cannot pickle is caught earlier, with the way out).  Other executors,
    a Dask client's among them, get cloudpickle bytes: their serializer may send a
    function by name, which fails on a worker that cannot import its module.
    """
    if is_thread_pool(executor) or is_process_pool(executor):
        return _run_share, cost
    try:
        import cloudpickle
    except ImportError:
        return _run_share, cost
    return _run_shipped_share, cloudpickle.dumps(cost)


# Requests go to an executor in this many shares per worker, so that shares of uneven
# cost balance across the workers.
SHARES_PER_WORKER = 4
SHARES_PER_CPU = SHARES_PER_WORKER     # the former name


def executor_workers(executor) -> int:
    """How many evaluations the executor runs at once, as its public API tells.

    A Dask client says (``nthreads()``, summed over its workers); the standard pools
    do not say publicly (their worker count is a private attribute, not read here),
    so the local CPU count stands in, a fair guess for the pools people pass.

    Parameters
    ----------
    executor : concurrent.futures.Executor, dask.distributed.Client or None

    Returns
    -------
    int
        At least 1.

    Examples
    --------
    >>> class TwoWorkers:
    ...     def nthreads(self):
    ...         return {"tcp://a": 1, "tcp://b": 1}
    >>> executor_workers(TwoWorkers())
    2
    """
    count = getattr(executor, "nthreads", None)
    if callable(count):
        try:
            total = sum(int(c) for c in dict(count()).values())
        except Exception:  # noqa: BLE001 - a client that cannot say: fall back to the CPUs
            total = 0
        if total > 0:
            return total
    return os.cpu_count() or 1


def _share_bounds(m: int, workers: int = 0) -> list:
    """(lo, hi) of each executor share of m requests, in order, none empty."""
    n = min(m, SHARES_PER_WORKER * (workers or os.cpu_count() or 1))
    bounds = np.linspace(0, m, n + 1).astype(int) if m else np.zeros(1, dtype=int)
    return [(int(lo), int(hi)) for lo, hi in zip(bounds[:-1], bounds[1:]) if hi > lo]


def _is_future(obj) -> bool:
    """A concurrent.futures.Future, or anything that offers result() and cancel()."""
    return isinstance(obj, Future) or (callable(getattr(obj, "result", None)) and
                                       callable(getattr(obj, "cancel", None)))


def _executor_failed(executor, exc, during: str) -> ExecutorError:
    """The one clear error for an executor that cannot evaluate (its own failure, never
    the cost's: the cost's exceptions are caught on the worker, per point)."""
    name = type(executor).__name__
    got = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
    if isinstance(exc, BrokenExecutor):
        why = (f"a worker of the {name} died while evaluating the cost ({got}); the cost may "
               "call os._exit, crash in compiled code, or run out of memory, and the pool is "
               "broken now. Run the check without the executor to see where the cost stops")
    elif isinstance(exc, RuntimeError) and "shutdown" in str(exc):
        why = (f"the {name} is shut down ({got}); pass an executor that is running, and shut "
               "it down after the check")
    elif isinstance(exc, CancelledError):
        why = (f"the {name} cancelled evaluations of the check ({got}); was it shut down "
               "during the check?")
    elif isinstance(exc, SystemExit):
        why = (f"a worker of the {name} exited while evaluating the cost ({got}): the cost "
               "calls sys.exit")
    else:
        why = f"the {name} failed {during} ({got})"
    return ExecutorError(f"executor: {why}")


def _cancel(submitted, stop) -> None:
    """Stop what is still queued; a thread pool's running shares see `stop` and end."""
    if stop is not None:
        stop.set()
    for future, _, _ in submitted:
        future.cancel()


def _run_executor(cost, layout, base, where, amounts, executor, bar, reuse=True):
    """Shares of the requests on an executor; returns (values, failures, stop), where
    stop is None, INTERRUPTED, or the ExecutorError that ended the run."""
    m = len(amounts)
    values = _missing(m, _value_dtype(amounts))
    failures = {}
    worker, payload = _shipped(cost, executor)
    # Threads share memory: an Event tells running shares to stop after a Ctrl-C.
    stop = threading.Event() if is_thread_pool(executor) else None
    extra = (stop,) if stop is not None else ()
    submitted = []
    try:
        for lo, hi in _share_bounds(m, executor_workers(executor)):
            try:
                future = executor.submit(worker, payload, layout, base, where[lo:hi],
                                         amounts[lo:hi], lo, reuse, *extra)
            except Exception as exc:  # noqa: BLE001 - the executor's failure, not the cost's
                _cancel(submitted, stop)
                return values, failures, _executor_failed(executor, exc, "in submit")
            if not _is_future(future):
                _cancel(submitted, stop)
                return values, failures, ExecutorError(
                    f"executor: {type(executor).__name__}.submit returned "
                    f"{type(future).__name__}, not a future; an executor must follow "
                    "concurrent.futures.Executor (submit returns a Future)")
            submitted.append((future, lo, hi))
        for future, lo, hi in submitted:
            try:
                share_values, share_failures, interrupted = future.result()
            except (BrokenExecutor, CancelledError, SystemExit) as exc:   # the executor is done
                _cancel(submitted, stop)
                return values, failures, _executor_failed(executor, exc, "to return a result")
            except Exception as exc:  # noqa: BLE001 - this share failed; the others may not
                failure = ExecutorFailure(f"the {type(executor).__name__} could not evaluate "
                                          f"this point ({type(exc).__name__}: {exc}); the "
                                          "cost may not have been called")
                failure.__cause__ = exc
                failures.update({k: failure for k in range(lo, hi)})
                if bar is not None:
                    bar.update(hi - lo)
                continue
            values[lo:hi] = share_values
            failures.update(share_failures)
            if bar is not None:
                bar.update(hi - lo)
            if interrupted:          # the cost raised KeyboardInterrupt on a worker
                _cancel(submitted, stop)
                return values, failures, INTERRUPTED
    except KeyboardInterrupt:
        _cancel(submitted, stop)
        return values, failures, INTERRUPTED
    return values, failures, None


INTERRUPTED = "interrupted"   # the stop reason of a run ended by Ctrl-C


def cost_label(cost) -> str:
    """A short name of a cost for the progress bar: its qualified name, or its class's.

    Examples
    --------
    >>> def ridge_loss(w):
    ...     return w
    >>> cost_label(ridge_loss)
    'ridge_loss'
    """
    if isinstance(cost, functools.partial):
        return cost_label(cost.func)
    name = getattr(cost, "__qualname__", None) or getattr(cost, "__name__", None)
    if not isinstance(name, str):
        name = type(cost).__name__
    return name.replace(".<locals>", "")


class CostRunner:
    """Calls one cost near one base point and counts every evaluation honestly.

    Once a run is stopped (Ctrl-C, or an executor that fails), the runner calls the
    cost no more: later runs return at once with every value missing, so a check
    winds up promptly and its entry point raises `stop_error()`.

    Parameters
    ----------
    cost : callable
        params -> float (a batch of params -> one value per row when vectorized).
    layout : tree.Layout
    base : ndarray of float, shape (n,)
    vectorized : bool
    executor : concurrent.futures.Executor or None
    batch_bytes : int, optional
        Memory of one vectorized batch (default: default_batch_bytes(), at run time).
    progress : bool or None
        None: a bar when the run looks longer than PROGRESS_AFTER_SECONDS on a terminal.
    name : str, optional
        What the progress bar calls the cost (default: its function name).

    Raises
    ------
    CheckTypeError
        For an executor that is not one.
    CheckInputError
        For a cost a process pool cannot pickle.
    """

    def __init__(self, cost, layout: Layout, base: np.ndarray, *, vectorized=False,
                 executor=None, batch_bytes=None, progress=None, name=None, chunk_bytes=None):
        check_executor(executor)
        self.cost, self.layout, self.base = cost, layout, base
        self.vectorized, self.executor = vectorized, executor
        # read at run time, so setting evaluate.DEFAULT_BATCH_BYTES changes the bound;
        # chunk_bytes is the former name of batch_bytes (tests/test_scale.py uses it)
        self.batch_bytes, self.progress = batch_bytes or chunk_bytes, progress
        self.name = name or cost_label(cost)
        self.evaluations = 0
        self.output_dtype = np.dtype(np.float64)
        self.seconds_per_call = 0.0
        self.stop = None             # None, INTERRUPTED or the ExecutorError that ended a run
        self.edits_input = False     # set when a base call is seen to change its input
        if executor is not None:
            _check_picklable(cost, executor)

    @property
    def interrupted(self) -> bool:
        """True once a run stopped early (Ctrl-C, or a failed executor; see `stop`):
        no more evaluations are made."""
        return self.stop is not None

    def stop_error(self, report=None, what="gradient check"):
        """The exception a check's entry point raises when this runner stopped early,
        carrying `report` (the partial report); None when it did not stop.

        For a failed executor the report is marked as failed by its executor (a
        problem), not as interrupted.
        """
        if self.stop is None:
            return None
        if self.stop == INTERRUPTED:
            return CheckInterrupted(report, what, self.evaluations)
        if report is not None and hasattr(report, "problems"):
            report.interrupted = False
            report.problems.append(f"stopped after {self.evaluations} evaluations: "
                                   f"{self.stop}; the rows cover the coordinates finished "
                                   "before")
        return ExecutorError(str(self.stop), report)

    def call_once(self, vector: np.ndarray):
        """One call at `vector` (a batch of one if vectorized); returns (value, params after)."""
        if self.vectorized:
            batch = rebuild(vector.copy()[None, :], self.layout, batched=True)
            t0 = time.perf_counter()
            out = np.asarray(self.cost(batch))
            self.seconds_per_call = time.perf_counter() - t0
            self.evaluations += 1
            check_batch_shape(out, 1)
            self._note_dtype(out)
            return out.reshape(()).item(), batch
        params = rebuild(vector.copy(), self.layout)
        t0 = time.perf_counter()
        y = self.cost(params)
        self.seconds_per_call = time.perf_counter() - t0
        self.evaluations += 1
        value = as_scalar(y)
        self._note_dtype(y)
        return value, params

    def _note_dtype(self, y):
        dtype = np.asarray(y).dtype
        self.output_dtype = dtype if np.issubdtype(dtype, np.floating) else np.dtype(np.float64)

    def at_base(self, label="at the base point"):
        """The cost at the base point; a clear CheckInputError if it fails there.

        Raises
        ------
        CheckInputError
            The cost raised, returned no scalar, a complex or a non-finite value.
        CheckInterrupted
            Ctrl-C during the call (no report: nothing was checked yet).
        """
        if self.stop is not None:
            raise self.stop_error(None) from None
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", np.exceptions.ComplexWarning)
                value, after = self.call_once(self.base)
        except KeyboardInterrupt:
            self.stop = INTERRUPTED
            raise CheckInterrupted(None, evaluations=self.evaluations) from None
        except NotScalarError as exc:
            raise CheckInputError(f"cost: {exc}") from exc
        except Exception as exc:
            raise CheckInputError(
                f"cost raised {type(exc).__name__} {label}: {exc}") from exc
        if isinstance(value, complex):
            raise CheckInputError("cost returned a complex number at real parameters; "
                                  "expected a real scalar")
        if not math.isfinite(value):
            raise CheckInputError(f"cost returned {value} {label}; expected a finite number"
                                  + self._non_finite_params())
        return value, after

    def _non_finite_params(self) -> str:
        """Where params themselves hold nan or inf: the likely reason, for the message."""
        with np.errstate(invalid="ignore"):
            bad = np.flatnonzero(~np.isfinite(self.base))
        if bad.size == 0:
            return ""
        names = [coordinate_name(self.layout, int(i)) for i in bad[:3]]
        more = f" and {bad.size - 3} more" if bad.size > 3 else ""
        return f" (params hold non-finite entries: {', '.join(names)}{more})"

    def changed_leaves(self, after) -> list:
        """Names of the parameters that the last base call changed in place."""
        try:
            now, _ = flatten(after)  # a batch of one flattens to the same n values
        except Exception:  # noqa: BLE001 - a changed structure is a change too
            now = None
        if now is None or now.shape != self.base.shape:
            changed = ["the structure of params"]
        else:
            # Nothing changed (the common case): one comparison of all values first.
            changed = [] if _same_values(now, self.base) else \
                [leaf.name for leaf in self.layout.leaves
                 if not np.array_equal(now[leaf.offset:leaf.offset + leaf.size],
                                       self.base[leaf.offset:leaf.offset + leaf.size],
                                       equal_nan=True)]
        self.edits_input = self.edits_input or bool(changed)
        return changed

    def _bar(self, m, label):
        show = self.progress
        if show is None:
            seconds = m * self.seconds_per_call
            if self.executor is not None:
                seconds /= executor_workers(self.executor)
            show = seconds > PROGRESS_AFTER_SECONDS and sys.stderr.isatty()
        if not show:
            return None
        from tqdm.auto import tqdm  # imported only when a bar is shown
        return tqdm(total=m, desc=f"{self.name}: {label}", unit="eval", file=sys.stderr,
                    leave=False)

    def _dispatch(self, where, amounts, bar):
        """(values, failures, stop) from the serial, vectorized or executor path."""
        if self.vectorized:
            values, failures, interrupted = _run_vectorized(
                self.cost, self.layout, self.base, where, amounts,
                self.batch_bytes or default_batch_bytes(), bar, reuse=not self.edits_input)
        elif self.executor is not None:
            return _run_executor(self.cost, self.layout, self.base, where, amounts,
                                 self.executor, bar, reuse=not self.edits_input)
        else:
            values, failures, interrupted = _run_serial(self.cost, self.layout, self.base,
                                                        where, amounts, 0, bar,
                                                        reuse=not self.edits_input)
        return values, failures, INTERRUPTED if interrupted else None

    def run(self, where: list, amounts: list, label="evaluating") -> Results:
        """Evaluate base + amounts[k] * where[k] for every k, in order.

        Parameters
        ----------
        where : list
            Per request: a coordinate number, a direction vector of shape (n,), or None.
        amounts : list of float or complex
        label : str
            What the progress bar says is being evaluated.

        Returns
        -------
        Results
            Values (NaN where a point failed or was not reached), the failures, and
            whether the run stopped early.  After a stop, nothing is evaluated.
        """
        m = len(amounts)
        if self.stop is not None:
            return Results(_missing(m, _value_dtype(amounts)), {}, True)
        bar = None
        # Points near the base may lie where the cost is undefined (a log stepped across
        # 0): the values say so; numpy's warnings about them would only alarm the user.
        try:
            bar = self._bar(m, label)
            with np.errstate(all="ignore"):
                values, failures, stop = self._dispatch(where, amounts, bar)
        except KeyboardInterrupt:     # in the bar, or between the dispatcher's calls
            values, failures, stop = _missing(m, _value_dtype(amounts)), {}, INTERRUPTED
        finally:
            if bar is not None:
                bar.close()
        done = int(np.sum(~np.isnan(values))) + len(failures) if stop else m
        self.evaluations += done
        if stop is not None and self.stop is None:
            self.stop = stop
        return Results(values, failures, stop is not None)


def draw_seed(seed) -> int:
    """The seed of with_rng's generator: the caller's seed itself (so seed=N replays the
    draw a report names), or a fresh random one where none was given."""
    if seed is not None:
        return int(seed)
    return int(np.random.SeedSequence().generate_state(1)[0])


class SeededCall:
    """`fun(params)` that calls `fun(params, rng)` with a generator seeded the same way at
    every call (common random numbers): a dropout mask or a sampled mini-batch stays the
    same across a stencil's points, so one draw of a random cost is checked exactly.

    A class, not a closure, so that process executors can pickle it with the function.

    Examples
    --------
    >>> import numpy as np
    >>> noisy = SeededCall(lambda x, rng: float(x + rng.normal()), seed=7)
    >>> noisy(1.0) == noisy(1.0)
    True
    """

    def __init__(self, fun, seed: int):
        self.fun, self.seed = fun, seed

    def __call__(self, params):
        return self.fun(params, np.random.default_rng(self.seed))
