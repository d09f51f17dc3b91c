"""Detection rates on a corpus of planted bugs (built in bug_corpus.py).

Bugs are planted on one coordinate whose gradient is at least 1% of the largest
(sign flip, factor 2 or 1/2, relative errors of 1%, 0.1% and 10 ppm, a dropped
term), or on two (swapped) or a whole parameter (shifted), over the machine
learning losses of ml_losses.py on four invented data sets and the More, Garbow
& Hillstrom suite at x0 and 10*x0.  A detection counts only when the report
fails and every changed coordinate is among its mismatches.
"""
import collections

import numpy as np
import pytest

import bug_corpus
import gradcheck_kit as gk
from gradcheck_kit.tree import flatten

REQUIRED = {kind: 0.99 for kind in bug_corpus.GROSS}
REQUIRED.update({"relative-1e-3": 0.98, "relative-1e-5": 0.90})


def detection_rates(method, seed):
    found = collections.Counter()
    total = collections.Counter()
    for case in bug_corpus.build(seed=seed, seeds=range(2), draws=1):
        report = gk.compare_gradient(case.cost, case.params, case.gradient, method=method)
        named = {row.flat_index for row in report.mismatches}
        total[case.kind] += 1
        found[case.kind] += (not report.passed) and set(case.changed) <= named
    return {kind: found[kind] / total[kind] for kind in total}, total


@pytest.mark.parametrize("method, seed", [("auto", 0), ("richardson", 1)])
def test_detection_rates_meet_the_targets(mgh_derivatives, method, seed):
    # mgh_derivatives: the corpus uses its gradients; sympy's cost stays in the fixture
    rates, total = detection_rates(method, seed)
    assert set(rates) == set(REQUIRED)
    assert min(total.values()) >= 40  # enough cases per kind for a rate to mean something
    low = {k: f"{rates[k]:.3f} < {REQUIRED[k]}" for k in rates if rates[k] < REQUIRED[k]}
    assert not low, low


def _planted_relation_holds(kind, wrong, right, changed, spans):
    """The change a kind promises, checked from the two flat gradients alone."""
    i = changed[0]
    if kind == "sign":
        return len(changed) == 1 and wrong[i] == -right[i]
    if kind == "double":
        return len(changed) == 1 and wrong[i] == 2 * right[i]
    if kind == "half":
        return len(changed) == 1 and wrong[i] == right[i] / 2
    if kind.startswith("relative-"):
        size = float(kind.split("-", 1)[1])
        return len(changed) == 1 and np.isclose(abs(wrong[i] / right[i] - 1), size, rtol=1e-6)
    if kind == "dropped-term":
        return len(changed) == 1 and abs(wrong[i] - right[i]) >= 1e-2 * abs(right[i])
    if kind == "swapped":
        j = changed[-1]
        return len(changed) == 2 and wrong[i] == right[j] and wrong[j] == right[i]
    if kind == "shifted":
        lo, hi = next((a, b) for a, b in spans if a <= i < b)
        return all(lo <= c < hi for c in changed) and \
            np.array_equal(wrong[lo:hi], np.roll(right[lo:hi], 1))
    raise AssertionError(f"unknown kind {kind}")


def test_corpus_changes_what_it_says(mgh_derivatives):
    """The corpus itself, checked against the module docstring above: each kind is present
    (so detection cannot pass vacuously), each planted gradient differs from the right one
    in the way its kind says, on coordinates of at least 1% of the largest, and nowhere
    else (a shift may move small entries by under 1e-3 of the largest, unlisted)."""
    cases = bug_corpus.build(seed=5, seeds=range(1), draws=1)
    assert {c.kind for c in cases} == set(bug_corpus.KINDS)
    for case in cases:
        wrong, layout = flatten(case.gradient)
        right = case.right
        spans = [(leaf.offset, leaf.offset + leaf.size) for leaf in layout.leaves]
        changed = list(case.changed)
        label = (case.source, case.kind, changed)
        assert changed and _planted_relation_holds(case.kind, wrong, right, changed, spans), label
        assert np.all(wrong[changed] != right[changed]), label
        if case.kind != "shifted":
            assert np.all(np.abs(right[changed]) >= 1e-2 * np.max(np.abs(right))), label
        rest = np.setdiff1d(np.arange(right.size), changed)
        off = np.abs(wrong[rest] - right[rest])
        limit = 1e-3 * np.max(np.abs(right)) if case.kind == "shifted" else 0.0
        assert np.all(off <= limit), label
