"""Stage 3, evaluate: calling the cost near the base point.

A request is "base + amount * direction", where the direction is a coordinate
number (a unit vector) or a dense vector.  Requests run serially, as batched
calls of a vectorized cost, or on any concurrent.futures.Executor, always in
request order.  Every call gets fresh arrays, so the caller's arrays are never
touched; a point where the cost raises or returns a non-scalar is recorded as a
failure for that point alone, not for the whole check.
"""
from __future__ import annotations

import math
import pickle
import sys
import time
import warnings
from concurrent.futures import Executor, ProcessPoolExecutor, ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from .errors import CheckInputError
from .tree import Layout, flatten, rebuild, rebuilder

# Memory of one batch of a vectorized cost.  Far inside the 256 MB a batch may take:
# measured on a 2-core machine (tests/benchmarks.py), 4 MiB batches, which stay in cache,
# ran the same costs 1.0-2x faster than 256 MB ones.  Settable: a cost with a large fixed
# cost per call (a compiled or accelerator kernel) may want bigger batches.
DEFAULT_CHUNK_BYTES = 4 * 2**20
PROGRESS_AFTER_SECONDS = 2.0       # show a bar when the run looks longer than this


class NotScalarError(ValueError):
    """The cost returned something that is not one number."""


class NotComplexSafeError(TypeError):
    """The cost dropped the imaginary part of a complex-step point."""


NOT_COMPLEX_SAFE = ("the cost returned a real value at a complex point: it drops the imaginary "
                    "part, so the complex step cannot be used (use method='richardson')")


@dataclass
class Results:
    values: np.ndarray                              # one per request; NaN where it failed
    failures: dict = field(default_factory=dict)   # request number -> exception
    interrupted: bool = False                      # Ctrl-C arrived; later values are NaN


def as_scalar(y):
    """The cost's value as a Python float or complex; NotScalarError otherwise."""
    if isinstance(y, float):     # float and numpy float64: the common, fast case
        return y
    a = np.asarray(y)
    if a.size != 1:
        raise NotScalarError(f"the cost returned an array of shape {a.shape}; expected one number")
    if not (np.issubdtype(a.dtype, np.number) or a.dtype == np.bool_):
        raise NotScalarError(f"the cost returned {type(y).__name__}; expected a number")
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
    v = base.astype(np.complex128) if isinstance(amount, complex) else base.copy()
    if _is_coordinate(where):
        v[where] += amount
    elif where is not None:
        v += amount * where
    return v


def _run_serial(cost, layout, base, where, amounts, start, bar):
    """Evaluate requests one by one; returns (values, failures, interrupted)."""
    m = len(amounts)
    dtype = _value_dtype(amounts)
    values = _missing(m, dtype)
    failures = {}
    is_complex = dtype == np.complex128
    build = rebuilder(layout, complex_values=is_complex)
    for k in range(m):
        try:
            y = as_scalar(cost(build(_point(base, where[k], amounts[k]))))
            if is_complex and not isinstance(y, complex):
                raise NotComplexSafeError(NOT_COMPLEX_SAFE)
            values[k] = y
        except KeyboardInterrupt:
            return values, failures, True
        except Exception as exc:  # noqa: BLE001 - any failure of user code is data here
            failures[start + k] = exc
        if bar is not None:
            bar.update(1)
    return values, failures, False


def _run_chunk(cost, layout, base, where, amounts, start):
    """Worker-side evaluation of one chunk (picklable: module-level, plain arguments)."""
    values, failures, _ = _run_serial(cost, layout, base, where, amounts, start, None)
    return values, failures


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
        ints = all(_is_coordinate(w) for w in where)
        if not (ints and self.reuse):
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


def _run_vectorized(cost, layout, base, where, amounts, chunk_bytes, bar, reuse=True):
    m = len(amounts)
    dtype = _value_dtype(amounts)
    is_complex = dtype == np.complex128
    row_bytes = base.size * np.dtype(dtype).itemsize
    per_batch = max(1, int(chunk_bytes // max(row_bytes, 1)))
    values = _missing(m, dtype)
    failures = {}
    batches = _Batches(base, min(per_batch, max(m, 1)), values.dtype, reuse)
    for lo in range(0, m, per_batch):
        hi = min(m, lo + per_batch)
        batch = batches.rows(where[lo:hi], amounts[lo:hi])
        try:
            out = np.asarray(cost(rebuild(batch, layout, batched=True)))
            if out.shape not in ((hi - lo,), (hi - lo, 1)):
                raise NotScalarError(
                    f"the vectorized cost returned shape {out.shape} for a batch of {hi - lo} "
                    f"points; expected ({hi - lo},): one value per batch row")
            if is_complex and not np.iscomplexobj(out):
                raise NotComplexSafeError(NOT_COMPLEX_SAFE)
            values[lo:hi] = out.reshape(-1)
        except KeyboardInterrupt:
            return values, failures, True
        except Exception as exc:  # noqa: BLE001
            for k in range(lo, hi):
                failures[k] = exc
        finally:
            batches.restore()
        if bar is not None:
            bar.update(hi - lo)
    return values, failures, False


def _check_picklable(cost, executor):
    if not isinstance(executor, ProcessPoolExecutor):
        return
    try:
        pickle.dumps(cost)
    except Exception as exc:  # noqa: BLE001
        raise CheckInputError(
            "executor: a process pool must pickle the cost, and this one cannot be pickled "
            f"({type(exc).__name__}: {exc}). Define the cost at module level (not a lambda or a "
            "closure), or pass a ThreadPoolExecutor, or a Dask client's get_executor(), which "
            "uses cloudpickle") from exc


def _run_shipped_chunk(blob, layout, base, where, amounts, start):
    """Worker side of a cost sent as cloudpickle bytes (see _shipped)."""
    import cloudpickle

    return _run_chunk(cloudpickle.loads(blob), layout, base, where, amounts, start)


def _shipped(cost, executor):
    """(worker function, cost payload) for an executor.

    Threads share the cost; a process pool gets it through the standard pickle (a
    cost it cannot pickle is caught earlier, with the way out).  Other executors,
    a Dask client's among them, get cloudpickle bytes: their serializer may send a
    function by name, which fails on a worker that cannot import its module.
    """
    if isinstance(executor, (ThreadPoolExecutor, ProcessPoolExecutor)):
        return _run_chunk, cost
    try:
        import cloudpickle
    except ImportError:
        return _run_chunk, cost
    return _run_shipped_chunk, cloudpickle.dumps(cost)


def _run_executor(cost, layout, base, where, amounts, executor, bar):
    m = len(amounts)
    workers = getattr(executor, "_max_workers", None) or 4
    n_chunks = min(m, 4 * workers)
    bounds = np.linspace(0, m, n_chunks + 1).astype(int) if m else [0]
    worker, payload = _shipped(cost, executor)
    futures = [executor.submit(worker, payload, layout, base, where[lo:hi], amounts[lo:hi], lo)
               for lo, hi in zip(bounds[:-1], bounds[1:]) if hi > lo]
    pieces, failures = [], {}
    try:
        for fut, lo, hi in zip(futures, bounds[:-1], bounds[1:]):
            try:
                vals, fails = fut.result()
            except Exception as exc:  # noqa: BLE001 - the chunk never ran (e.g. unpicklable)
                vals = _missing(hi - lo, _value_dtype(amounts))
                fails = {k: exc for k in range(lo, hi)}
            pieces.append(vals)
            failures.update(fails)
            if bar is not None:
                bar.update(hi - lo)
    except KeyboardInterrupt:
        for fut in futures:
            fut.cancel()
        done = np.concatenate(pieces) if pieces else np.empty(0)
        values = _missing(m, np.result_type(done.dtype, np.float64))
        values[:done.size] = done
        return values, failures, True
    values = np.concatenate(pieces) if pieces else np.empty(0)
    return values, failures, False


class CostRunner:
    """Calls one cost near one base point and counts every evaluation honestly."""

    def __init__(self, cost, layout: Layout, base: np.ndarray, *, vectorized=False,
                 executor=None, chunk_bytes=None, progress=None):
        if executor is not None and not isinstance(executor, Executor) and \
                not hasattr(executor, "submit"):
            raise CheckInputError(
                f"executor: expected a concurrent.futures.Executor, got {type(executor).__name__}")
        self.cost, self.layout, self.base = cost, layout, base
        self.vectorized, self.executor = vectorized, executor
        # read at run time, so setting evaluate.DEFAULT_CHUNK_BYTES changes the bound
        self.chunk_bytes, self.progress = chunk_bytes, progress
        self.evaluations = 0
        self.output_dtype = np.dtype(np.float64)
        self.seconds_per_call = 0.0
        self.interrupted = False
        self.edits_input = False     # set when a base call is seen to change its input
        if executor is not None:
            _check_picklable(cost, executor)

    def call_once(self, vector: np.ndarray):
        """One call at `vector` (a batch of one if vectorized); returns (value, params after)."""
        if self.vectorized:
            batch = rebuild(vector.copy()[None, :], self.layout, batched=True)
            t0 = time.perf_counter()
            out = np.asarray(self.cost(batch))
            self.seconds_per_call = time.perf_counter() - t0
            self.evaluations += 1
            if out.shape not in ((1,), (1, 1)):
                raise NotScalarError(
                    f"the vectorized cost returned shape {out.shape} for a batch of 1 point; "
                    "expected (1,): one value per batch row")
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
        """The cost at the base point; a clear CheckInputError if it fails there."""
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", np.exceptions.ComplexWarning)
                value, after = self.call_once(self.base)
        except NotScalarError as exc:
            raise CheckInputError(f"cost: {exc} (return a scalar, e.g. with .sum())") from exc
        except Exception as exc:
            raise CheckInputError(
                f"cost raised {type(exc).__name__} {label}: {exc}") from exc
        if isinstance(value, complex):
            raise CheckInputError("cost returned a complex number at real parameters; "
                                  "expected a real scalar")
        if not math.isfinite(value):
            raise CheckInputError(f"cost returned {value} {label}; expected a finite number")
        return value, after

    def changed_leaves(self, after) -> list:
        """Names of the parameters that the last base call changed in place."""
        try:
            now, _ = flatten(after)  # a batch of one flattens to the same n values
        except Exception:  # noqa: BLE001 - a changed structure is a change too
            now = None
        if now is None or now.shape != self.base.shape:
            changed = ["the structure of params"]
        else:
            changed = [leaf.name for leaf in self.layout.leaves
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
                seconds /= max(getattr(self.executor, "_max_workers", 1) or 1, 1)
            show = sys.stderr.isatty() and seconds > PROGRESS_AFTER_SECONDS
        if not show:
            return None
        from tqdm.auto import tqdm  # imported only when a bar is shown
        return tqdm(total=m, desc=label, unit="eval", file=sys.stderr, leave=False)

    def _dispatch(self, where, amounts, bar):
        if self.vectorized:
            return _run_vectorized(self.cost, self.layout, self.base, where, amounts,
                                   self.chunk_bytes or DEFAULT_CHUNK_BYTES, bar,
                                   reuse=not self.edits_input)
        if self.executor is not None:
            return _run_executor(self.cost, self.layout, self.base, where, amounts,
                                 self.executor, bar)
        return _run_serial(self.cost, self.layout, self.base, where, amounts, 0, bar)

    def run(self, where: list, amounts: list, label="evaluating") -> Results:
        """Evaluate base + amounts[k] * where[k] for every k, in order."""
        m = len(amounts)
        bar = self._bar(m, label)
        # Points near the base may lie where the cost is undefined (a log stepped across
        # 0): the values say so; numpy's warnings about them would only alarm the user.
        try:
            with np.errstate(all="ignore"):
                values, failures, stopped = self._dispatch(where, amounts, bar)
        finally:
            if bar is not None:
                bar.close()
        done = int(np.sum(~np.isnan(values))) + len(failures) if stopped else m
        self.evaluations += done
        self.interrupted = self.interrupted or stopped
        return Results(values, failures, stopped)
