"""A test of the test: false alarms of unbiased estimators stay within a binomial bound of
the level, planted biases are found, and the report's "detectable" claim holds.

Looser, smaller versions of what tests/stochastic_benchmark.py measures (its docstring and
output carry the full numbers).  Seeds are fixed, so the counts are fixed: these cannot
flake, and a change of the statistics that breaks them is a real regression.  The bound
for false alarms is the 99.9% quantile of Binomial(runs, level) (scipy.stats.binom), the
most a test at `level` may show on `runs` independent runs without being suspect."""
import pytest
from scipy.stats import binom

import stochastic_benchmark as sb

LEVEL = 0.2          # a high level, so a too-liberal test shows on few runs
RUNS = 25


@pytest.mark.parametrize("est", sb.UNBIASED, ids=lambda e: e.name)
def test_unbiased_estimators_raise_few_false_alarms(est):
    alarms, runs, _ = sb.false_alarms(est, range(100, 100 + RUNS), LEVEL, max_draws=1024)
    assert alarms <= binom.ppf(0.999, runs, LEVEL), (alarms, runs)


def test_false_alarms_pooled_over_the_corpus_stay_at_or_below_the_level():
    total = 0
    for est in sb.UNBIASED:
        total += sb.false_alarms(est, range(200, 215), LEVEL, max_draws=256)[0]
    runs = 15 * len(sb.UNBIASED)
    assert total <= LEVEL * runs, (total, runs)


def test_a_numeric_reference_raises_no_more_false_alarms():
    alarms = sum(sb.false_alarms(est, range(300, 310), LEVEL, reference="cost",
                                 max_draws=512)[0] for est in sb.UNBIASED[:4])
    assert alarms <= binom.ppf(0.999, 40, LEVEL)


@pytest.mark.parametrize("est", sb.PLANTED, ids=lambda e: e.name)
def test_planted_bugs_are_found_at_the_default_level(est):
    found = sb.detection(est, range(5), 1e-3)
    assert found["found"] == found["runs"], found


def test_biases_above_the_stated_detectable_one_are_found():
    kept = claimed = 0
    for est in sb.PLANTED:
        r = sb.detection(est, range(10, 14), 1e-3)
        kept, claimed = kept + r["kept"], claimed + r["claimed"]
    assert claimed >= 40 and kept >= 0.9 * claimed, (kept, claimed)

