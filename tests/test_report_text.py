"""The report's text says what happened: the worst error of the rows that fail, a check
that did not run, which method suggested tolerances hold for, numbers as numbers,
singular nouns, and the remainder-order probe behind a sampled check.

Costs and points are invented; a right gradient's Taylor remainder is O(h^2) and a
wrong one's O(h) (common practice, Taylor's theorem).
"""
import json
import re

import numpy as np

import gradcheck_kit as gk
from float32_fits import tank_fit


def smooth(x):
    return np.sum(np.exp(np.sin(x)) + 0.5 * x ** 3)


def smooth_gradient(x):
    return np.cos(x) * np.exp(np.sin(x)) + 1.5 * x ** 2


X = np.linspace(-1.3, 1.7, 24)


def first_line(report):
    return report.to_text().splitlines()[0]


def test_a_pass_with_a_kink_quotes_the_agreeing_rows_error():
    report = gk.compare_gradient(lambda v: np.sum(np.abs(v)) + np.sum(v ** 2),
                                 np.array([0.0, 0.5, -1.0]), lambda v: np.sign(v) + 2 * v)
    line = first_line(report)
    assert line.startswith("PASS") and "(1 kink)" in line, line
    assert "worst relative error of the agreeing rows" in line
    quoted = float(re.search(r"agreeing rows ([0-9.e+-]+)", line).group(1))
    assert quoted < 1e-10       # not the kink row's meaningless error


def test_a_failure_quotes_the_failing_rows_error_as_the_table_shows_it():
    wrong = lambda v: smooth_gradient(v) * np.where(np.arange(24) == 5, 1 + 1.4e-7, 1.0)  # noqa: E731
    report = gk.compare_gradient(smooth, X, wrong)
    line = first_line(report)
    assert line.startswith("FAIL") and "worst relative error of the failing rows" in line
    row_text = report.to_text().splitlines()[2]
    assert row_text.split()[0] == "x[5]"
    assert re.search(r"failing rows ([0-9.e+-]+)", line).group(1) == row_text.split()[4]
    assert report.worst_relative_error_over == "failing"


def test_a_check_that_did_not_run_says_so():
    rng = np.random.default_rng(3)
    report = gk.compare_gradient(lambda v: np.sum(v ** 2) + 1e-3 * rng.normal(), np.ones(3),
                                 lambda v: 2 * v)
    line = first_line(report)
    assert line.startswith("FAIL gradient check: not run: the cost is not deterministic"), line
    assert "all 0" not in line and "worst relative error" not in line and "method" not in line
    assert not report.ran and json.loads(report.to_json())["ran"] is False


def test_suggested_tolerances_name_their_method_and_give_central_ones():
    report = gk.compare_gradient(smooth, X, smooth_gradient)
    assert report.method == "complex-step"
    text = report.to_text()
    assert "for method complex-step (used here)" in text
    assert 'for method="central"' in text
    # the complex step's tolerance is far too tight for central differences ...
    tight = gk.compare_gradient(smooth, X, smooth_gradient, method="central",
                                rtol=report.suggested_rtol, atol=report.suggested_atol)
    assert not tight.passed
    # ... the central one given beside it holds
    assert report.suggested_central_rtol > report.suggested_rtol
    pinned = gk.compare_gradient(smooth, X, smooth_gradient, method="central",
                                 rtol=report.suggested_central_rtol,
                                 atol=report.suggested_central_atol)
    assert pinned.passed, pinned.to_text()


def test_a_central_check_gives_one_set_of_tolerances():
    report = gk.compare_gradient(smooth, X, smooth_gradient, method="central")
    assert report.suggested_central_rtol is None
    assert 'method="central"' not in report.to_text()


def test_numbers_print_as_numbers_and_one_is_singular():
    report = gk.compare_gradient(lambda v: float(np.sum(v ** 2)), np.array([1.5]),
                                 lambda v: 2 * v)
    text = report.to_text()
    assert "np.float64" not in text and "1 coordinate agrees" in text, text
    kinked = gk.compare_gradient(lambda v: np.sum(np.abs(v)) + np.sum(v ** 2),
                                 np.array([0.0, 0.5]), lambda v: np.sign(v) + 2 * v)
    assert any(n.startswith("1 coordinate on a kink") for n in kinked.notes), kinked.notes
    assert "1 coordinates" not in kinked.to_text()


# --- sampled coordinates: the remainder-order probe through all of them --------------------
N = 300
WEIGHTS = np.where(np.arange(N) < 200, 1.0, 0.01)
POINT = np.linspace(0.2, 1.4, N)


def weighted(v):
    return np.sum(WEIGHTS * np.sin(v) ** 2)


def weighted_gradient(v):
    return WEIGHTS * np.sin(2 * v)


def wrong_outside(v):
    g = weighted_gradient(v)
    g[200:] *= 40.0     # small entries, never among the largest that sampling keeps
    return g


def test_a_bug_outside_the_sample_fails_the_check_and_says_so():
    report = gk.compare_gradient(weighted, POINT, wrong_outside, coordinates=4, seed=1)
    assert all(r.flat_index < 200 for r in report.rows)   # the sample misses the bug
    assert all(r.verdict == "agree" for r in report.rows)
    assert not report.passed
    text = " ".join(report.problems)
    assert "wrong outside the 4 sampled coordinates" in text and f"all {N}" in text
    assert report.extra["remainder_passed"] is False
    assert report.extra["remainder_order"] < 1.5


def test_a_right_sampled_check_says_the_probe_found_nothing():
    report = gk.compare_gradient(weighted, POINT, weighted_gradient, coordinates=4, seed=0)
    assert report.passed
    assert any("no sign of a wrong gradient outside the 4 sampled coordinates" in n
               for n in report.notes), report.notes
    assert json.loads(report.to_json())["extra"]["remainder_passed"] is True


def test_a_full_check_runs_no_probe():
    report = gk.compare_gradient(smooth, X, smooth_gradient)
    assert "remainder_order" not in report.extra
    assert not any("remainder-order probe" in n for n in report.notes)


def test_json_documents_every_key():
    data = json.loads(gk.compare_gradient(smooth, X, smooth_gradient).to_json())
    doc = gk.report.__doc__
    for key in data:
        assert re.search(rf"^\s+{key}\b|, {key}\b", doc, flags=re.M), key
    assert data["title"] == "gradient check" and data["schema_version"] == 2


def test_a_central_tolerance_too_loose_to_catch_anything_is_not_offered_to_pin():
    # A float32 least-squares fit with an intercept near 850: central differences cannot
    # resolve the slopes, and a suggested rtol of 1 or more would pass any gradient.
    cost, gradient, params = tank_fit(850.0)
    report = gk.compare_gradient(cost, params, gradient)
    assert report.passed, report.to_text()
    line = report.to_text().splitlines()[-1]
    assert report.suggested_central_rtol >= 0.1, line
    assert "central differences cannot check these coordinates" in line, line
    assert "what tests often pin" not in line, line


# --- a mismatch search (gk.locate_mismatches) that finds nothing --------------------------

def test_a_mismatch_search_that_finds_nothing_says_so_in_plain_words():
    report = gk.locate_mismatches(smooth, X, smooth_gradient, seed=0)
    text = report.to_text()
    assert text.startswith("PASS mismatch search: no mismatch found: 1 probe cleared all 24 "
                           "coordinates; method "), text
    assert "not run" not in text and "1 probes" not in text and "of 24 in params" not in text
    assert "group testing: 1 probe over 24 coordinates isolated none (" in text
    assert report.ran and json.loads(report.to_json())["ran"] is True


def test_a_mismatch_search_counts_in_the_singular_and_the_plural():
    one = gk.locate_mismatches(smooth, X[:1], smooth_gradient, seed=0).to_text()
    assert "no mismatch found: 1 probe cleared the one coordinate" in one, one
    assert "1 probe over 1 coordinate isolated none" in one
    wrong = lambda v: smooth_gradient(v) * np.where(np.arange(v.size) == 5, 2.0, 1.0)  # noqa: E731
    found = gk.locate_mismatches(smooth, X, wrong, seed=0).to_text()
    assert re.search(r"group testing: \d+ probes over 24 coordinates isolated 1, which was "
                     r"then checked on its own", found), found


def test_a_mismatch_search_cut_short_before_any_coordinate_says_why():
    # x[5] is wrong; the budgets end the search after its first and second group probes
    wrong = lambda v: smooth_gradient(v) * np.where(np.arange(v.size) == 5, 2.0, 1.0)  # noqa: E731
    for budget, probes in ((33, "1 group probe"), (34, "2 group probes")):
        text = gk.locate_mismatches(smooth, X, wrong, seed=0, budget=budget).to_text()
        assert text.startswith(f"FAIL mismatch search: no coordinate confirmed: the budget of "
                               f"{budget} evaluations ran out after {probes}; "), text
        assert "not run" not in text and "0 wrong coordinates isolated so far" in text
