"""Detection rates on a corpus of planted bugs (built in bug_corpus.py).

Bugs are planted on one coordinate whose gradient is at least 1% of the largest
(sign flip, factor 2 or 1/2, relative errors of 1%, 0.1% and 10 ppm, a dropped
term), or on two (swapped) or a whole parameter (shifted), over the machine
learning losses of ml_losses.py on four invented data sets and the More, Garbow
& Hillstrom suite at x0 and 10*x0.  A detection counts only when the report
fails and every changed coordinate is among its mismatches.
"""
import collections

import pytest

import bug_corpus
import gradcheck_kit as gk

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
def test_detection_rates_meet_the_targets(method, seed):
    rates, total = detection_rates(method, seed)
    assert set(rates) == set(REQUIRED)
    assert min(total.values()) >= 40  # enough cases per kind for a rate to mean something
    low = {k: f"{rates[k]:.3f} < {REQUIRED[k]}" for k in rates if rates[k] < REQUIRED[k]}
    assert not low, low


def test_corpus_changes_what_it_says():
    """The corpus itself: each planted gradient differs from the right one at every
    coordinate it lists, and each kind is present (so detection cannot pass vacuously)."""
    import numpy as np
    from gradcheck_kit.tree import flatten

    cases = bug_corpus.build(seed=5, seeds=range(1), draws=1)
    assert {c.kind for c in cases} == set(bug_corpus.KINDS)
    for case in cases:
        wrong, _ = flatten(case.gradient)
        assert np.all(wrong[list(case.changed)] != case.right[list(case.changed)])
