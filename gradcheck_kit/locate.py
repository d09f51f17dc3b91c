"""Finding the few wrong coordinates among millions: adaptive group testing.

A probe tests a group of coordinates at once: along a random direction v that is
nonzero only on the group, the numeric directional derivative must equal the
analytic g.v.  A group that fails holds at least one wrong coordinate and is
split in two; a group that passes is cleared whole.  This is binary splitting
after Hwang, "A method for detecting all defective members in a population by
group testing", JASA 67, 1972: k wrong coordinates among n cost about
k log2(n / k) probes instead of n.  Each coordinate the search isolates is then
confirmed on its own with an ordinary stencil.

Random weights of random sign, between 1/2 and 3/2, keep two errors in one group
from cancelling.  Groups are ranges of one random permutation, so memory stays
at a few vectors of length n, never n x n.
"""
from __future__ import annotations

import numpy as np

from . import plan, stencils, verdicts
from .analytic import analytic_vector
from .pipeline import compare, finish, numeric_derivatives, prepare, resolve_method


class BudgetSpent(Exception):
    """The evaluation budget ran out before the search finished."""


class _Prober:
    def __init__(self, setup, analytic, method, rng, budget):
        self.setup, self.g, self.method, self.rng = setup, analytic, method, rng
        self.budget = budget
        self.probes = 0

    def _spend(self, n):
        if self.budget is not None and self.setup.runner.evaluations + n > self.budget:
            raise BudgetSpent

    def group_fails(self, members: np.ndarray) -> bool:
        """Does the directional derivative along a random v on `members` disagree?"""
        setup = self.setup
        v = np.zeros(setup.base.size)
        weights = self.rng.uniform(0.5, 1.5, members.size) * self.rng.choice([-1.0, 1.0],
                                                                            members.size)
        v[members] = weights * setup.scale[members]
        if self.method == "complex-step":
            self._spend(1)
            h = stencils.COMPLEX_STEP
            run = setup.runner.run([v], [1j * h], label="group test")
            values = run.values.reshape(1, 1)
            est = stencils.combine("complex-step", values, setup.f0, np.array([h]),
                                   setup.eps_f, np.ones(1))
        else:
            self._spend(2)
            h = float(stencils.default_steps("central", np.zeros(1), np.array([np.max(setup.eps)]))[0])
            run = setup.runner.run([v, v], [h, -h], label="group test")
            values = run.values.reshape(1, 2)
            est = stencils.combine("central", values, setup.f0, np.array([h]), setup.eps_f,
                                   np.ones(1), setup.line.noise)
        self.probes += 1
        if run.failures:
            return True     # a failing cost in the group is worth isolating too
        analytic = float(self.g @ v)
        terms = float(np.sum(np.abs(self.g[members] * v[members])))
        allowed = verdicts.allowed_difference(analytic, est.derivative[0], est.error[0],
                                              terms=terms, eps_f=setup.eps_f)
        return not abs(analytic - est.derivative[0]) <= allowed


def _search(prober, order, lo, hi, known_bad, found, pending):
    """Binary splitting over order[lo:hi]; appends isolated coordinates to `found`."""
    pending.append((lo, hi))
    if not known_bad and not prober.group_fails(order[lo:hi]):
        pending.pop()
        return
    if hi - lo == 1:
        found.append(int(order[lo]))
        pending.pop()
        return
    mid = (lo + hi) // 2
    left_bad = prober.group_fails(order[lo:mid])
    if left_bad:
        _search(prober, order, lo, mid, True, found, pending)
        _search(prober, order, mid, hi, False, found, pending)
    else:
        _search(prober, order, mid, hi, True, found, pending)
    pending.remove((lo, hi))


def locate_mismatches(cost, params, gradient=None, *, seed=None, budget=None, executor=None,
                      method="auto", progress=None):
    """Find the coordinates whose analytic gradient is wrong, with few evaluations.

    Returns a GradientReport with a row for every coordinate the search isolated
    (each confirmed on its own); `passed` when none is wrong.  `budget` caps the
    evaluations: a search cut short fails the report and says what is left.
    """
    if budget is not None and (not isinstance(budget, (int, np.integer)) or budget < 1):
        from .errors import CheckInputError
        raise CheckInputError(f"budget: expected an int >= 1 or None, got {budget!r}")
    setup = prepare(cost, params, executor=executor, progress=progress)
    analytic = analytic_vector(cost, setup.base, setup.layout, gradient)
    if setup.problems:
        return finish(setup, _empty_comparison(setup, analytic), method, title="mismatch search")
    used = resolve_method(setup, method, seed)
    rng = np.random.default_rng(seed)
    order = rng.permutation(setup.base.size)
    prober = _Prober(setup, analytic, used, rng, budget)
    found, pending = [], []
    try:
        _search(prober, order, 0, order.size, False, found, pending)
    except BudgetSpent:
        left = sum(hi - lo for lo, hi in pending)
        setup.problems.append(
            f"the budget of {budget} evaluations ran out after {prober.probes} group probes: "
            f"{len(found)} wrong coordinates isolated so far, {left} coordinates not cleared")
    coords = np.unique(np.array(found, dtype=int))
    if budget is not None:   # the confirmations are spent from the budget too
        left = budget - setup.runner.evaluations
        fit = max(0, left // len(stencils.OFFSETS[used]))
        if fit < coords.size:
            setup.problems.append(f"{coords.size - fit} isolated coordinates were not "
                                  "confirmed on their own: the budget ran out")
            coords = coords[:fit]
    h = plan.steps(used, setup.base, setup.layout, None, setup.eps)
    comparison = compare(setup, numeric_derivatives(setup, used, coords, h), analytic, None, None)
    setup.notes.append(f"group testing: {prober.probes} probes over {setup.base.size} "
                       f"coordinates isolated {coords.size}; each was then checked on its own "
                       "(a full sweep would have cost "
                       f"{len(stencils.OFFSETS[used]) * setup.base.size} evaluations)")
    report = finish(setup, comparison, used, title="mismatch search")
    report.extra["probes"] = prober.probes
    return report


def _empty_comparison(setup, analytic):
    h = np.ones(setup.base.size)
    empty = np.zeros(0, dtype=int)
    return compare(setup, numeric_derivatives(setup, "central", empty, h), analytic, None, None)
