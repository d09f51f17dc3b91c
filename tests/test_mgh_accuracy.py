"""numeric_gradient against exact gradients on the More, Garbow & Hillstrom suite.

Source: More, Garbow & Hillstrom, "Testing Unconstrained Optimization Software",
ACM TOMS 7(1), 1981 (functions written from the paper's definitions, from
memory; see mgh_problems.py).  Exact gradients: sympy's symbolic derivative,
evaluated by mpmath at 40 digits.  The error measure is the max-norm relative
error max_i |numeric_i - exact_i| / max_i |exact_i|.
"""
import numpy as np
import pytest

import gradcheck_kit as gk
from mgh_problems import BY_NAME, PROBLEMS, exact_gradient

TARGETS = {"central": 1e-6, "five-point": 1e-9, "richardson": 1e-9, "complex-step": 1e-13}


def max_norm_error(numeric, exact):
    return np.max(np.abs(numeric - exact)) / np.max(np.abs(exact))


@pytest.mark.parametrize("method", sorted(TARGETS))
def test_worst_error_on_the_suite_meets_the_target(method):
    worst, where = 0.0, None
    for p in PROBLEMS:
        x0 = np.array(p.x0)
        err = max_norm_error(gk.numeric_gradient(p.cost, x0, method=method),
                             exact_gradient(p.name, x0))
        if err > worst:
            worst, where = err, p.name
    assert worst <= TARGETS[method], f"{method}: worst {worst:.2e} on {where}"


def test_central_error_matches_the_textbook_order():
    """Nocedal & Wright, 2nd ed., section 8.1: with h ~ eps^(1/3) the central
    difference error is of order eps^(2/3) (about 4e-11) on a well-scaled function."""
    p = BY_NAME["rosenbrock"]
    x0 = np.array(p.x0)
    err = max_norm_error(gk.numeric_gradient(p.cost, x0, method="central"),
                         exact_gradient(p.name, x0))
    eps = np.finfo(float).eps
    assert 1e-3 * eps ** (2 / 3) < err < 100 * eps ** (2 / 3)


def test_forward_error_matches_the_textbook_order():
    """Nocedal & Wright, section 8.1: forward differences with h ~ sqrt(eps) leave an
    error of order sqrt(eps) (about 1.5e-8)."""
    p = BY_NAME["rosenbrock"]
    x0 = np.array(p.x0)
    err = max_norm_error(gk.numeric_gradient(p.cost, x0, method="forward"),
                         exact_gradient(p.name, x0))
    assert 1e-11 < err < 1e-6


@pytest.mark.parametrize("method", ["richardson", "five-point", "central", "complex-step"])
def test_reported_error_estimates_cover_the_actual_error(method):
    """On the whole suite at x0, |numeric - exact| stays within twice the error
    estimate plus the verdict's rounding allowance for almost every coordinate."""
    covered = total = 0
    for p in PROBLEMS:
        x0 = np.array(p.x0)
        exact = exact_gradient(p.name, x0)
        report = gk.compare_gradient(p.cost, x0, exact, method=method)
        for row in report.rows:
            total += 1
            covered += row.verdict == "agree"
    assert covered / total >= (0.98 if method == "central" else 1.0)


@pytest.mark.parametrize("name", ["rosenbrock", "wood", "biggs_exp6", "extended_rosenbrock"])
def test_error_estimate_is_not_wildly_pessimistic(name):
    """A useful estimate is within a few orders of the true error, not a blanket bound."""
    p = BY_NAME[name]
    x0 = np.array(p.x0)
    report = gk.compare_gradient(p.cost, x0, exact_gradient(name, x0), method="richardson")
    g = np.max(np.abs([r.analytic for r in report.rows]))
    assert max(r.error_estimate for r in report.rows) < 1e-6 * g
