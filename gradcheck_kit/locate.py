"""Finding the few wrong coordinates among millions: adaptive group testing.

A probe tests a group of coordinates at once: along a random direction v that is
nonzero only on the group, the numeric directional derivative must equal the
analytic g.v.  A group that fails holds at least one wrong coordinate and is
split in two; a group that passes is cleared whole.  This is binary splitting
after Hwang, "A method for detecting all defective members in a population by
group testing", JASA 67, 1972: k wrong coordinates among n cost about
k log2(n / k) probes instead of n.  Each coordinate the search isolates is then
confirmed on its own with an ordinary stencil.

Two measures cut the probes further (3 wrong of 1e6: about 20 probes, not 90).
Weights are drawn once per coordinate, so a group's directional derivative is the
sum of its halves': the second half of a split is inferred from the group and the
first half, and probed only where the inferred value passes (a group is cleared
only by a probe of its own).  And a failing group is first probed once more with
weights tilted by position: a lone wrong coordinate's mismatch scales with its
tilt, so the ratio of the two mismatches says where it is, within a range set by
the error bounds (quantitative group testing); where the range holds no wrong
coordinate, several share the group and it is halved as before.

Random weights of random sign, between 1/2 and 3/2, keep two errors in one group
from cancelling.  Groups are parts of one random permutation, so memory stays
at a few vectors of length n, never n x n.
"""
from __future__ import annotations

import numpy as np

from . import notes as say
from . import plan, stencils, verdicts
from .analytic import analytic_vector
from .errors import interrupts_as_check_interrupted
from .pipeline import compare, finish, numeric_derivatives, prepare, resolve_method

TITLE = "mismatch search"


class BudgetSpent(Exception):
    """The evaluation budget ran out before the search finished."""


class SearchStopped(Exception):
    """The runner stopped (Ctrl-C, a failed executor): the search ends where it is."""


class _Prober:
    """Directional-derivative probes of groups, with one random weight per coordinate.

    The weights are drawn once for the whole search, so the derivative along a group
    is the sum of those along its halves: once a group and its left half are
    measured, the right half's derivative is their difference, with the sum of
    their error estimates as its own.  Binary splitting then costs one probe per
    level instead of two (Hwang's count, k log2(n / k), without the probes of the
    halves that turn out clean).
    """

    def __init__(self, setup, analytic, method, rng, budget):
        self.setup, self.g, self.method = setup, analytic, method
        self.budget = budget
        self.probes = 0
        n = setup.base.size
        self.v = rng.uniform(0.5, 1.5, n) * rng.choice([-1.0, 1.0], n) * setup.scale
        self.gv = analytic * self.v

    def _spend(self, n):
        if self.budget is not None and self.setup.runner.evaluations + n > self.budget:
            raise BudgetSpent

    def measure(self, members: np.ndarray, tilt=None) -> "_Group":
        """The numeric derivative along the weights on `members` (times `tilt`, one
        factor per member, where given), and its analytic value."""
        setup = self.setup
        v = np.zeros(setup.base.size)
        v[members] = self.v[members] if tilt is None else self.v[members] * tilt
        if self.method == "complex-step":
            self._spend(1)
            h = plan.COMPLEX_STEP
            run = setup.runner.run([v], [1j * h], label="group test")
            values = run.values.reshape(1, 1)
            est = stencils.combine("complex-step", values, np.array([h]), np.ones(1),
                                   stencils.Near(setup.f0, setup.eps_f))
        else:
            self._spend(2)
            h = float(plan.default_steps("central", np.zeros(1), np.array([np.max(setup.eps)]))[0])
            run = setup.runner.run([v, v], [h, -h], label="group test")
            values = run.values.reshape(1, 2)
            est = stencils.combine("central", values, np.array([h]), np.ones(1),
                                   stencils.Near(setup.f0, setup.eps_f, setup.line.noise))
        if run.interrupted:
            raise SearchStopped
        self.probes += 1
        gv = self.gv[members] if tilt is None else self.gv[members] * tilt
        return _Group(float(np.sum(gv)), float(est.derivative[0]), float(est.error[0]),
                      float(np.sum(np.abs(gv))), bool(run.failures))

    def rest(self, whole: "_Group", part: "_Group", members: np.ndarray) -> "_Group":
        """The group `members` = whole minus part, from the two measurements (no probe)."""
        gv = self.gv[members]
        return _Group(float(np.sum(gv)), whole.numeric - part.numeric,
                      whole.error + part.error, float(np.sum(np.abs(gv))),
                      whole.failed and not part.failed)

    def allowed(self, group: "_Group") -> float:
        """How far the group's numeric and analytic values may differ when it is right."""
        return float(verdicts.allowed_difference(group.analytic, group.numeric, group.error,
                                                 terms=group.terms, eps_f=self.setup.eps_f))

    def fails(self, group: "_Group") -> bool:
        """Does the group's directional derivative disagree with the analytic one?"""
        if group.failed:
            return True     # a failing cost in the group is worth isolating too
        return not abs(group.analytic - group.numeric) <= self.allowed(group)

    def pinpoint(self, members: np.ndarray, group: "_Group"):
        """Where a lone wrong coordinate of a failing group would be: a slice of members.

        Weights tilted by position, t_j = (j + 1) / m, make a lone wrong coordinate's
        share of the mismatch t_j times its share without the tilt, so one probe reads
        its position off the ratio of the two mismatches; the error bounds of both
        widen that to a range.  None where the ratio says nothing (a mismatch inside
        its bounds, a failed point) or points outside the group (several wrong ones).
        """
        m = members.size
        miss, bound = group.analytic - group.numeric, self.allowed(group)
        if group.failed or not abs(miss) > 2 * bound:
            return None
        tilted = self.measure(members, np.arange(1, m + 1) / m)
        if tilted.failed:
            return None
        ratio = (tilted.analytic - tilted.numeric) / miss
        spread = (self.allowed(tilted) + abs(ratio) * bound) / (abs(miss) - bound)
        first = max(0, int(np.ceil((ratio - spread) * m)) - 1)
        last = min(m - 1, int(np.floor((ratio + spread) * m)) - 1)
        if last < first or last - first + 1 > m // 2:
            return None
        return slice(first, last + 1)


class _Group:
    """One group's directional derivative: analytic, numeric, its error estimate, the
    size of its terms, and whether the cost failed on the way."""

    __slots__ = ("analytic", "numeric", "error", "terms", "failed")

    def __init__(self, analytic, numeric, error, terms, failed):
        self.analytic, self.numeric, self.error = analytic, numeric, error
        self.terms, self.failed = terms, failed


# Groups this large or more are first tried with a position-tilted probe (see pinpoint).
PINPOINT_FROM = 8


def _search(prober, members, group, found, pending):
    """Search `members` (a group whose measurement `group` failed; None: not measured
    yet) for its wrong coordinates; appends them to `found`.  `pending` lists the
    groups not cleared yet (what a search cut short by the budget leaves)."""
    pending.append(members)
    if group is None:
        group = prober.measure(members)
        if not prober.fails(group):
            pending.pop()
            return
    if members.size == 1:
        found.append(int(members[0]))
        pending.pop()
        return
    at = prober.pinpoint(members, group) if members.size >= PINPOINT_FROM else None
    if at is not None:
        inner = prober.measure(members[at])
        if prober.fails(inner):
            # The tilt found a wrong coordinate: search its range, then the rest, which
            # holds others only if the inner range does not explain the whole mismatch.
            others = np.concatenate([members[:at.start], members[at.stop:]])
            _search(prober, members[at], inner, found, pending)
            _search(prober, others, _inferred(prober, group, inner, others), found, pending)
            _drop(pending, members)
            return
        # The ratio pointed at no wrong coordinate: several share the group; halve it.
    mid = members.size // 2
    left = prober.measure(members[:mid])
    right = prober.rest(group, left, members[mid:])
    if prober.fails(left):
        _search(prober, members[:mid], left, found, pending)
        _search(prober, members[mid:], _inferred(prober, group, left, members[mid:]),
                found, pending)
    else:
        # A group that failed holds a wrong coordinate: where the left half passes, the
        # right half is searched even if its inferred value happens to agree.
        _search(prober, members[mid:], right, found, pending)
    _drop(pending, members)


def _inferred(prober, whole, part, members):
    """The measurement of `members` = whole minus part, inferred where it fails; None
    (measure it) where it passes: the inferred value carries the error bounds of two
    probes, so a small mismatch could hide in it, and a group is only cleared by a
    probe of its own."""
    rest = prober.rest(whole, part, members)
    return rest if prober.fails(rest) else None


def _drop(pending, members) -> None:
    """Remove `members` (by identity: arrays do not compare as one value) from pending."""
    for k in range(len(pending) - 1, -1, -1):
        if pending[k] is members:
            del pending[k]
            return


@interrupts_as_check_interrupted(TITLE)
def locate_mismatches(cost, params, gradient=None, *, seed=None, budget=None, executor=None,
                      method="auto", progress=None):
    """Find the coordinates whose analytic gradient is wrong, with few evaluations.

    Adaptive group testing (binary splitting, after Hwang, JASA 67, 1972): k wrong
    coordinates among n cost about k log2(n / k) group probes, then each isolated
    coordinate is confirmed on its own with an ordinary stencil.

    Parameters
    ----------
    cost : callable
        params -> float.
    params : ndarray, float, or a dict / list / tuple nest of those
    gradient : callable, structure like params, or None
        None: autograd differentiates the cost.
    seed : int >= 0 or None
        Draws the group order and the probe directions.
    budget : int >= 1 or None
        Caps the cost evaluations; a search cut short fails the report and says what is left.
    executor : concurrent.futures.Executor or None
    method : str
        The method of the confirmations ("auto" as in compare_gradient).
    progress : bool or None

    Returns
    -------
    GradientReport
        A row for every coordinate the search isolated; `passed` when none is wrong;
        `extra["probes"]` counts the group probes.

    Raises
    ------
    CheckTypeError, CheckInputError
        For bad input (before the cost is called).
    CheckInterrupted
        On Ctrl-C, with the partial report (the coordinates confirmed so far) in `.report`.
    ExecutorError
        When the executor stops working, with the partial report.

    Examples
    --------
    >>> import numpy as np
    >>> def loss(w):
    ...     return float(np.sum(w ** 2))
    >>> def wrong(w):
    ...     g = 2 * w
    ...     g[3] = 0.0
    ...     return g
    >>> report = locate_mismatches(loss, np.linspace(1, 2, 64), wrong, seed=0)
    >>> [row.name for row in report.mismatches]
    ['x[3]']
    """
    plan.check_callable(cost, "cost")
    options = plan.check_options(seed=seed, budget=budget, executor=executor, method=method,
                                 progress=progress)
    budget = options["budget"]
    setup = prepare(cost, params, executor=executor, progress=progress)
    stop = setup.runner.stop_error(None, TITLE)
    if stop is not None:
        raise stop
    analytic = analytic_vector(cost, setup.base, setup.layout, gradient)
    if setup.problems:
        return finish(setup, _empty_comparison(setup, analytic), method, title=TITLE)
    used, method_notes = resolve_method(setup, method, seed)
    rng = np.random.default_rng(seed)
    order = rng.permutation(setup.base.size)
    prober = _Prober(setup, analytic, used, rng, budget)
    found, pending, problems = [], [], []
    try:
        _search(prober, order, None, found, pending)
    except BudgetSpent:
        left = sum(members.size for members in pending)
        problems.append(say.search_budget_spent(budget, prober.probes, len(set(found)), left))
    except SearchStopped:
        pass     # the rows confirmed below (none: the runner evaluates no more) tell the rest
    coords = np.unique(np.array(found, dtype=int))
    isolated = coords.size
    if budget is not None:   # the confirmations are spent from the budget too
        left = budget - setup.runner.evaluations
        fit = max(0, left // len(plan.OFFSETS[used]))
        if fit < coords.size:
            problems.append(say.unconfirmed(coords.size - fit))
            coords = coords[:fit]
    h = plan.steps(used, setup.base, setup.layout, None, setup.eps)
    comparison = compare(setup, numeric_derivatives(setup, used, coords, h), analytic, None, None)
    search_note = say.search_note(prober.probes, setup.base.size, isolated, coords.size,
                                  len(plan.OFFSETS[used]) * setup.base.size)
    report = finish(setup, comparison, used, title=TITLE, notes=method_notes + [search_note],
                    problems=problems)
    report.extra["probes"] = prober.probes
    stop = setup.runner.stop_error(report, TITLE)
    if stop is not None:
        raise stop
    return report


def _empty_comparison(setup, analytic):
    h = np.ones(setup.base.size)
    empty = np.zeros(0, dtype=int)
    return compare(setup, numeric_derivatives(setup, "central", empty, h), analytic, None, None)
