"""The stochastic-gradient check: is a sampled gradient estimator right on average?

A pipeline of its own, data moving one way:

    params -> tree -> draws (stochastic_draws) -> moments and tests (stochastic_stats)
           -> verdicts and hints (stochastic_verdicts) -> report (stochastic_report)

with the reference taken from the engine's public checks (`compare_gradient` for a cost's
numeric gradient with its error estimates) or from given gradient values.  This module
wires the stages and computes no statistics of its own.
"""
from __future__ import annotations

import math
import sys
import time

import numpy as np

from . import stochastic_stats as stats
from . import stochastic_verdicts as sv
from .errors import CheckInputError, CheckInterrupted
from .stochastic_draws import DrawRunner
from .stochastic_report import StochasticReport, StochasticRow
from .tree import entry_name, flatten, flatten_like, leaf_and_index, rebuild

FIRST_ROUND = 64             # draws of the first round; each later round doubles the total
MIN_DRAWS = 16               # the batch means need their groups filled
# Rounding allowed between a given reference and the draws' mean, relative to the size of
# their values: both are sums of terms that may be far larger than the result (as
# verdicts.ANALYTIC_ROUNDING allows for an analytic gradient).
VALUE_ROUNDING = 1000.0
PROGRESS_AFTER_SECONDS = 2.0


def draw_schedule(max_draws: int) -> list:
    """Total draws after each round: 64, 128, 256, ... up to max_draws (the last).

    Examples
    --------
    >>> draw_schedule(300)
    [64, 128, 256, 300]
    >>> draw_schedule(16)
    [16]
    """
    rounds = [min(FIRST_ROUND, max_draws)]
    while rounds[-1] < max_draws:
        rounds.append(min(2 * rounds[-1], max_draws))
    return rounds


def _check_options(level, max_draws, seed, resolution, progress, cost, gradient):
    if (cost is None) == (gradient is None):
        raise CheckInputError(
            "compare_stochastic_gradient: pass exactly one reference, cost= (the deterministic "
            "full cost, differentiated numerically) or gradient= (a function of params or "
            f"values shaped like params); got {'both' if cost is not None else 'neither'}")
    if cost is not None and not callable(cost):
        raise CheckInputError(f"cost: expected a callable taking params, got "
                              f"{type(cost).__name__}")
    if isinstance(level, bool) or not isinstance(level, (int, float)) or \
            not 0.0 < float(level) <= 0.5:
        raise CheckInputError(f"level: expected a number with 0 < level <= 0.5 (the family-wise "
                              f"false-alarm rate), got {level!r}")
    if isinstance(max_draws, bool) or not isinstance(max_draws, (int, np.integer)) or \
            max_draws < MIN_DRAWS:
        raise CheckInputError(f"max_draws: expected an integer >= {MIN_DRAWS}, got {max_draws!r}")
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer))
                             or seed < 0):
        raise CheckInputError(f"seed: expected None or a non-negative integer, got {seed!r}")
    if isinstance(resolution, bool) or not isinstance(resolution, (int, float)) or \
            not (0.0 < float(resolution) and math.isfinite(resolution)):
        raise CheckInputError(f"resolution: expected a positive number (a relative bias), got "
                              f"{resolution!r}")
    if progress not in (None, True, False):
        raise CheckInputError(f"progress: expected True, False or None, got {progress!r}")


class _Reference:
    """The full gradient the draws should average to, with an error bound per coordinate."""

    def __init__(self, values, error, usable, details, kind, evaluations=0, notes=()):
        self.values, self.error, self.usable = values, error, usable
        self.details, self.kind, self.evaluations = details, kind, evaluations
        self.notes = list(notes)


def _given_reference(gradient, base, layout) -> _Reference:
    if callable(gradient):
        try:
            values = gradient(rebuild(base.copy(), layout))
        except Exception as exc:
            raise CheckInputError(f"gradient raised {type(exc).__name__} at params: {exc}") \
                from exc
    else:
        values = gradient
    vector = flatten_like(values, layout, "gradient")
    usable = np.isfinite(vector)
    details = ["" if ok else f"the given gradient is {vector[i]} here" for i, ok in
               enumerate(usable)]
    return _Reference(np.where(usable, vector, 0.0), np.zeros(layout.size), usable, details,
                      "gradient")


def _numeric_reference(cost, base, layout, mean, executor, progress) -> _Reference:
    """Numeric derivatives of the full cost through the engine's compare_gradient.

    The draws' first mean is handed over as the "analytic" side: the engine then rechecks
    with Richardson extrapolation exactly the coordinates where the mean looks off, which
    sharpens the reference where it matters.
    """
    from .pipeline import compare_gradient  # the engine's public check

    checked = compare_gradient(cost, rebuild(base.copy(), layout),
                               rebuild(mean.copy(), layout), executor=executor,
                               progress=progress, allow_undecided=True)
    if checked.problems:
        raise CheckInputError("cost: " + "; ".join(checked.problems))
    values = np.full(layout.size, np.nan)
    error = np.full(layout.size, np.inf)
    details = [""] * layout.size
    for row in checked.rows:
        values[row.flat_index], error[row.flat_index] = row.numeric, row.error_estimate
        if row.verdict in ("error", "non-finite"):
            details[row.flat_index] = f"the numeric reference failed here ({row.detail})"
        elif row.verdict == "kink":
            details[row.flat_index] = "the full cost has a kink here: the reference is one slope"
    usable = np.isfinite(values) & np.isfinite(error) & \
        np.array([not d.startswith("the numeric reference failed") for d in details])
    for i in np.flatnonzero(~usable):
        details[i] = details[i] or "the numeric reference is not finite here"
    notes = [f"reference: numeric derivatives of cost (method {checked.method}, "
             f"{checked.evaluations} evaluations); their error estimates widen every interval"]
    notes += [f"reference: {n}" for n in checked.notes]
    return _Reference(np.where(usable, values, 0.0), np.where(usable, error, 0.0), usable,
                      details, "cost", checked.evaluations, notes)


def _rounding(reference: _Reference, s: stats.Summary) -> np.ndarray:
    size = np.abs(reference.values) + np.sqrt(s.mean ** 2 + s.std ** 2)
    return reference.error + VALUE_ROUNDING * np.finfo(float).eps * size


class _Bar:
    """A tqdm bar over the draws: always (progress=True), never (False), or when the rest
    of the check looks longer than PROGRESS_AFTER_SECONDS on a terminal (None)."""

    def __init__(self, progress, total):
        self.progress, self.total, self.bar, self.start = progress, total, None, time.time()
        if progress:
            self._open(0)

    def _open(self, done):
        from tqdm.auto import tqdm  # imported only when a bar is shown
        self.bar = tqdm(total=self.total, initial=done, desc="draws", unit="draw",
                        file=sys.stderr, leave=False)

    def after_round(self, done):
        if self.bar is None and self.progress is None and done and sys.stderr.isatty():
            per_draw = (time.time() - self.start) / done
            if per_draw * (self.total - done) > PROGRESS_AFTER_SECONDS:
                self._open(done)

    def close(self):
        if self.bar is not None:
            self.bar.close()


def compare_stochastic_gradient(sample_gradient, params, *, cost=None, gradient=None,
                                level=1e-3, max_draws=4096, seed=None, executor=None,
                                progress=None, resolution=0.1) -> StochasticReport:
    """Test whether a sampled gradient estimator is right on average.

    Draws `sample_gradient(params, rng)` in growing rounds (64 draws, then doubling up to
    `max_draws`), each draw with its own reproducible generator, and compares the mean of
    the draws with the full gradient coordinate by coordinate, until every coordinate is
    decided or the budget is spent.

    The statistics, and why (details and sources in `stochastic_stats`):

    - per coordinate, a two-sided one-sample t test of "the mean of the draws is the
      reference", with the reference's own error bound subtracted from the bias estimate
      first (so a numeric reference's error cannot cause a false alarm); where the draws
      are heavy-tailed (large kurtosis: an unreliable variance estimate) the larger p-value
      of that test and of a batch-means t test over 16 groups is kept;
    - across coordinates, Holm's step-down procedure (Holm 1979), valid under any
      dependence between coordinates (the coordinates of one draw are correlated);
    - across rounds, the level is spent in shares proportional to each round's draws
      (about half of it on the last round, which decides the hard cases); by the union
      bound the chance of any false "disagree" anywhere is at most `level`.  A fixed,
      known schedule is used rather than an adaptive one so that the total cannot depend
      on the data.

    Parameters
    ----------
    sample_gradient : callable
        `sample_gradient(params, rng)` returns one draw of the estimator, shaped like
        params; `rng` is a `numpy.random.Generator` to take all its randomness from.
    params : array, float, or dict / list / tuple nest of those
        The point; never modified (every draw gets its own copy).
    cost : callable, optional
        The deterministic full cost; its numeric gradient (with the engine's error
        estimates, which enter the test) is the reference.
    gradient : callable or values, optional
        The full gradient: a function of params, or values shaped like params.  Exactly
        one of `cost` and `gradient` is given.
    level : float
        Family-wise false-alarm rate over all coordinates and rounds (0 < level <= 0.5).
    max_draws : int
        Most draws to take (at least 16).
    seed : int, optional
        Entropy of the per-draw streams; None draws it fresh (the report states it, so any
        check can be replayed draw for draw).
    executor : concurrent.futures.Executor, optional
        Where the draws (and the reference's cost evaluations) run.
    progress : bool, optional
        A progress bar over the draws: True, False, or None (when the check looks long).
    resolution : float
        Relative bias (against max(|reference|, rms of the reference)) small enough to
        call a coordinate "agree": it agrees when the whole confidence interval of its bias
        lies within +- resolution.

    Returns
    -------
    StochasticReport
        `.passed`, `.rows` (reference, mean, bias, standard error, interval, relative bias,
        smallest detectable relative bias, verdict "agree" / "disagree" / "noisy" /
        "non-finite" / "error"), `.hints`, `.notes`, `str(report)`, `.to_json()`, `.plot()`.

    Raises
    ------
    CheckInputError
        Bad options, a draw of the wrong structure, every draw of the first round failing,
        or a reference that cannot be computed.
    CheckInterrupted
        On Ctrl-C; `.report` holds what the finished draws show.

    Examples
    --------
    >>> import numpy as np
    >>> data = np.linspace(-1.0, 1.0, 50)
    >>> def batch_gradient(w, rng):          # d/dw of mean((w - data)^2 / 2), 5 at a time
    ...     batch = rng.choice(data, size=5, replace=False)
    ...     return np.array([np.mean(w[0] - batch)])
    >>> report = compare_stochastic_gradient(batch_gradient, np.array([0.5]),
    ...                                      gradient=np.array([0.5]), seed=1)
    >>> report.passed, report.rows[0].verdict
    (True, 'agree')
    """
    _check_options(level, max_draws, seed, resolution, progress, cost, gradient)
    base, layout = flatten(params)
    entropy = int(np.random.SeedSequence(seed).entropy)
    runner = DrawRunner(sample_gradient, layout, base, entropy, executor)
    rounds = draw_schedule(int(max_draws))
    shares = stats.spending(rounds)
    moments = stats.Moments(layout.size)
    failures, notes, done = {}, [], 0
    reference = summary = decision = None
    used_rounds = []
    bar = _Bar(progress, rounds[-1])
    interrupted = False
    try:
        for k, upto in enumerate(rounds):
            batch = runner.run(np.arange(done, upto), bar.bar)
            failures.update(batch.failures)
            moments.add(batch.values, batch.numbers)
            done = upto
            used_rounds.append(moments.count)
            if moments.count < 2:
                if k == 0:
                    raise _all_failed(failures, done)
                continue
            summary = stats.summarize(moments)
            if reference is None:
                notes += _replay_note(runner, batch)
                reference = (_given_reference(gradient, base, layout) if cost is None else
                             _numeric_reference(cost, base, layout, summary.mean, executor,
                                                progress))
            decision = sv.decide(summary, reference.values, _rounding(reference, summary),
                                 reference.usable, float(level) * shares[k], float(resolution),
                                 int(max_draws), reference.details, moments.non_finite,
                                 moments.first_non_finite)
            bar.after_round(done)
            if decision.decided:
                break
    except KeyboardInterrupt:
        interrupted = True
    finally:
        bar.close()
    report = _report(layout, reference, summary, decision, moments, failures, notes,
                     used_rounds, entropy, seed, float(level), float(resolution), int(max_draws),
                     interrupted)
    if interrupted:       # the front ends print the partial report; a library does not
        raise CheckInterrupted(report, "stochastic gradient check")
    return report


def _all_failed(failures, done) -> CheckInputError:
    first = min(failures)
    exc = failures[first]
    error = CheckInputError(
        f"sample_gradient raised at all {done} draws of the first round (draw {first}: "
        f"{type(exc).__name__}: {exc}); it must return one draw shaped like params when "
        "called as sample_gradient(params, rng)")
    error.__cause__ = exc
    return error


def _replay_note(runner: DrawRunner, batch) -> list:
    """Draw the first successful draw again: an estimator that takes randomness from
    elsewhere than rng (numpy's global state, random, a framework) cannot be replayed."""
    if batch.numbers.size == 0:
        return []
    again = runner.run(batch.numbers[:1])
    if again.values.shape[0] and np.array_equal(again.values[0], batch.values[0],
                                                equal_nan=True):
        return []
    return [f"sample_gradient is not reproducible from its rng: draw {int(batch.numbers[0])} "
            "gave other values when drawn again with the same generator, so it takes "
            "randomness from elsewhere (numpy's global state, the random module, a framework's "
            "generator); the test still holds, but seed= cannot replay the check"]


def _report(layout, reference, summary, decision, moments, failures, notes, used_rounds,
            entropy, seed, level, resolution, max_draws, interrupted) -> StochasticReport:
    rows, hints, problems = [], [], []
    notes = list(notes)
    if decision is not None:
        rows = _rows(layout, reference, summary, decision)
        hints = sv.hints(layout, decision, reference.values, summary.mean)
        notes = reference.notes + notes + sv.notes(layout, decision, summary, max_draws)
        if moments.identical:
            notes.append(f"sample_gradient returned the same values at all {moments.count} "
                         "draws: it does not use rng, so it is deterministic; the ordinary "
                         "check, gk.compare_gradient(cost, params, gradient=...), suits it "
                         "better (it compares exactly, coordinate by coordinate)")
        if rows and all(r.verdict == "noisy" for r in rows):
            problems.append(f"no coordinate could be decided in {moments.count} draws: the "
                            "draws vary too much; raise max_draws (the rows say how many "
                            "would do) or the resolution")
    if failures:
        first = min(failures)
        exc = failures[first]
        problems.append(f"{len(failures)} of {len(failures) + moments.count} draws raised "
                        f"(the first: draw {first}, {type(exc).__name__}: {exc}); the mean "
                        "over the others leaves them out and may be biased by it: every draw "
                        "of an estimator must succeed")
    if seed is None:
        notes.append(f"seed: drawn fresh; pass seed={entropy} to replay this check draw for "
                     "draw")
    return StochasticReport(
        rows=rows, level=level, resolution=resolution, draws=moments.count,
        rounds=used_rounds, seed=entropy,
        reference=reference.kind if reference is not None else "none",
        evaluations=reference.evaluations if reference is not None else 0,
        failed_draws=len(failures), total=layout.size, hints=hints, notes=notes,
        problems=problems, interrupted=interrupted)


def _rows(layout, reference, s: stats.Summary, d: sv.Decision) -> list:
    se = stats.effective_error(s)
    rows = []
    for i in range(layout.size):
        leaf, index = leaf_and_index(layout, i)
        tested = bool(np.isfinite(d.low[i]))
        nan = float("nan")
        rows.append(StochasticRow(
            name=entry_name(leaf, index), parameter=leaf.name, index=index, flat_index=i,
            reference=float(reference.values[i]) if reference.usable[i] else nan,
            reference_error=float(reference.error[i]) if reference.usable[i] else nan,
            mean=float(s.mean[i]) if tested else nan,
            bias=float(d.bias[i]) if tested else nan,
            standard_error=float(se[i]) if tested else nan,
            low=float(d.low[i]), high=float(d.high[i]),
            relative_bias=float(d.bias[i] / d.scale[i]) if tested else nan,
            detectable=float(d.detectable[i] / d.scale[i]) if tested else nan,
            scale=float(d.scale[i]), draws_needed=int(d.draws_needed[i]),
            verdict=str(d.verdict[i]), detail=d.details[i]))
    return rows
