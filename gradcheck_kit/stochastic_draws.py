"""Drawing the sampled gradient: one independent, reproducible random stream per draw.

Draw number k gets `numpy.random.Generator(PCG64(SeedSequence(entropy, spawn_key=(k,))))`:
the stream depends only on the seed's entropy and k, so a check replays draw for draw
whatever the rounds, the chunking or the executor (numpy's documented way to make
independent streams, "Parallel random number generation" in its manual).  Every draw gets
its own copy of params, so the caller's arrays are never touched; a draw that raises is
recorded for that draw alone.
"""
from __future__ import annotations

import pickle
from concurrent.futures import Executor
from dataclasses import dataclass, field

import numpy as np

from .errors import CheckInputError
from .evaluate import executor_workers, is_process_pool
from .tree import Layout, flatten_like, rebuild

WHAT = "sample_gradient's draw"


class WrongStructure(Exception):
    """A draw came back in another structure or shape than params (a usage error)."""


def stream(entropy: int, k: int) -> np.random.Generator:
    """The generator of draw number k under `entropy`.

    Examples
    --------
    >>> a, b = stream(7, 3).random(), stream(7, 3).random()
    >>> a == b and a != stream(7, 4).random()
    True
    """
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(entropy, spawn_key=(k,))))


def _one_draw(sample_gradient, layout: Layout, base: np.ndarray, entropy: int, k: int):
    out = sample_gradient(rebuild(base.copy(), layout), stream(entropy, k))
    try:
        return flatten_like(out, layout, WHAT)
    except CheckInputError as exc:
        raise WrongStructure(str(exc)) from None


def draw_chunk(sample_gradient, layout: Layout, base: np.ndarray, entropy: int, numbers):
    """Draws `numbers`, in order: (values, failures).  values has one row per draw (NaN
    rows where the draw raised); failures maps a draw number to its exception.  A wrong
    structure is not caught: it stops the check with one message.  Module level, plain
    arguments: a process pool can run it."""
    values = np.full((len(numbers), layout.size), np.nan)
    failures = {}
    for r, k in enumerate(numbers):
        try:
            with np.errstate(all="ignore"):
                values[r] = _one_draw(sample_gradient, layout, base, entropy, int(k))
        except WrongStructure:
            raise
        except KeyboardInterrupt:
            raise
        except Exception as exc:  # noqa: BLE001 - a failing draw of user code is data here
            failures[int(k)] = exc
    return values, failures


@dataclass
class Batch:
    numbers: np.ndarray                      # draw numbers of the rows that ran
    values: np.ndarray                       # (rows, size); only draws that did not raise
    failures: dict = field(default_factory=dict)


class DrawRunner:
    """Runs draws of one estimator at one point, serially or on an executor."""

    def __init__(self, sample_gradient, layout: Layout, base: np.ndarray, entropy: int,
                 executor=None):
        if not callable(sample_gradient):
            raise CheckInputError("sample_gradient: expected a callable "
                                  f"sample_gradient(params, rng), got "
                                  f"{type(sample_gradient).__name__}")
        if executor is not None and not isinstance(executor, Executor) and \
                not hasattr(executor, "submit"):
            raise CheckInputError(
                f"executor: expected a concurrent.futures.Executor, got {type(executor).__name__}")
        if is_process_pool(executor):
            try:
                pickle.dumps(sample_gradient)
            except Exception as exc:  # noqa: BLE001
                raise CheckInputError(
                    "executor: a process pool must pickle sample_gradient, and this one cannot "
                    f"be pickled ({type(exc).__name__}: {exc}); define it at module level (not "
                    "a lambda or closure), or pass a ThreadPoolExecutor") from exc
        self.sample_gradient, self.layout, self.base = sample_gradient, layout, base
        self.entropy, self.executor = entropy, executor
        self.calls = 0

    def run(self, numbers: np.ndarray, bar=None) -> Batch:
        """Draws with the given numbers; wrong structures raise CheckInputError."""
        try:
            if self.executor is None:
                values, failures = self._serial(numbers, bar)
            else:
                values, failures = self._pooled(numbers, bar)
        except WrongStructure as exc:
            raise CheckInputError(str(exc)) from None
        self.calls += len(numbers)
        ok = ~np.isin(numbers, list(failures))
        return Batch(np.asarray(numbers)[ok], values[ok], failures)

    def _serial(self, numbers, bar):
        # one chunk of at most 64 draws at a time, so a bar moves
        rows, failures = [], {}
        for lo in range(0, len(numbers), 64):
            part = numbers[lo:lo + 64]
            v, f = draw_chunk(self.sample_gradient, self.layout, self.base, self.entropy, part)
            rows.append(v)
            failures.update(f)
            if bar is not None:
                bar.update(len(part))
        return np.concatenate(rows) if rows else np.empty((0, self.layout.size)), failures

    def _pooled(self, numbers, bar):
        workers = executor_workers(self.executor)
        pieces = np.array_split(np.asarray(numbers), min(len(numbers), 4 * workers))
        futures = [self.executor.submit(draw_chunk, self.sample_gradient, self.layout,
                                        self.base, self.entropy, part)
                   for part in pieces if len(part)]
        rows, failures = [], {}
        try:
            for fut, part in zip(futures, [p for p in pieces if len(p)]):
                try:
                    v, f = fut.result()
                except WrongStructure:
                    raise
                except Exception as exc:  # noqa: BLE001 - the chunk never ran
                    v = np.full((len(part), self.layout.size), np.nan)
                    f = {int(k): exc for k in part}
                rows.append(v)
                failures.update(f)
                if bar is not None:
                    bar.update(len(part))
        except BaseException:
            for fut in futures:
                fut.cancel()
            raise
        return np.concatenate(rows), failures
