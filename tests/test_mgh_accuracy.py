"""numeric_gradient against exact gradients on the More, Garbow & Hillstrom suite.

Source: More, Garbow & Hillstrom, "Testing Unconstrained Optimization Software",
ACM TOMS 7(1), 1981 (functions written from the paper's definitions, from
memory; see mgh_problems.py).  Exact gradients: sympy's symbolic derivative,
evaluated by mpmath at 40 digits (the session fixture `mgh_derivatives`).  The
error measure is the max-norm relative error max_i |numeric_i - exact_i| / max_i |exact_i|.

Where a bound below is a measured value, the measurement is written beside it: the
same computation as the test's, run once by hand at commit 3b742e5 and printed.
"""
import numpy as np
import pytest

import gradcheck_kit as gk
from mgh_problems import BY_NAME, PROBLEMS

TARGETS = {"central": 1e-6, "five-point": 1e-9, "richardson": 1e-9, "complex-step": 1e-13}
EPS = np.finfo(float).eps


def max_norm_error(numeric, exact):
    return np.max(np.abs(numeric - exact)) / np.max(np.abs(exact))


@pytest.mark.parametrize("method", sorted(TARGETS))
def test_worst_error_on_the_suite_meets_the_target(mgh_derivatives, method):
    errors = {}
    for p in PROBLEMS:
        x0 = np.array(p.x0)
        errors[p.name] = max_norm_error(gk.numeric_gradient(p.cost, x0, method=method),
                                        mgh_derivatives.exact_gradient(p.name, x0))
    where = max(errors, key=errors.get)
    assert errors[where] <= TARGETS[method], f"{method}: worst {errors[where]:.2e} on {where}"


# Nocedal & Wright, Numerical Optimization, 2nd ed., section 8.1: with the step
# h ~ eps^(1/3) a central difference leaves an error of order eps^(2/3) (about 4e-11),
# with h ~ sqrt(eps) a one-sided difference one of order sqrt(eps) (about 1.5e-8).
# Measured on Rosenbrock at x0 with the automatic step (max-norm relative error, in units
# of that order): central 0.90, forward 2.85, backward 2.86.  The bounds are a factor 10
# either side of the measurement: a central difference that lost an order of accuracy
# (first order, like a one-sided one) would be about 500 times over the upper bound.
DEFAULT_STEP_ERROR = {"central": (EPS ** (2 / 3), 0.90), "forward": (EPS ** 0.5, 2.85),
                      "backward": (EPS ** 0.5, 2.86)}


@pytest.mark.parametrize("method", sorted(DEFAULT_STEP_ERROR))
def test_error_at_the_automatic_step_matches_the_textbook_order(mgh_derivatives, method):
    p = BY_NAME["rosenbrock"]
    x0 = np.array(p.x0)
    err = max_norm_error(gk.numeric_gradient(p.cost, x0, method=method),
                         mgh_derivatives.exact_gradient(p.name, x0))
    order, measured = DEFAULT_STEP_ERROR[method]
    assert measured / 10 < err / order < measured * 10, f"{method}: {err / order:.3g}"


# The truncation order itself (common practice: halving h divides the truncation error
# of an order-p stencil by 2^p): with steps 2^-6 .. 2^-9, where truncation dominates
# rounding by far, the error falls by a factor 4.00 (central) and 1.99-2.00 (forward,
# backward) per halving, measured on Rosenbrock at x0 as above.
@pytest.mark.parametrize("method, order", [("central", 2), ("forward", 1), ("backward", 1)])
def test_halving_a_given_step_shows_the_truncation_order(mgh_derivatives, method, order):
    p = BY_NAME["rosenbrock"]
    x0 = np.array(p.x0)
    exact = mgh_derivatives.exact_gradient(p.name, x0)
    steps = 2.0 ** -np.arange(6, 10)
    errors = [max_norm_error(gk.numeric_gradient(p.cost, x0, method=method, step=float(h)),
                             exact) for h in steps]
    slope = np.polyfit(np.log2(steps), np.log2(errors), 1)[0]
    assert abs(slope - order) < 0.1, (method, slope, errors)


# Measured on the suite at x0 (163 coordinates), |numeric - exact| <= error_estimate:
# central 163, complex step 163, Richardson 162 (jennrich_sampson x[1], 1.26 times its
# estimate), five-point 161 (jennrich_sampson x[0] and x[1], 1.41 and 1.01 times theirs).
# Every coordinate is within twice its estimate.  Raise these counts when an error model
# improves; lower them only with a reason.
ALLOWED_MISSES = {"central": 0, "complex-step": 0, "richardson": 1, "five-point": 2}


@pytest.mark.parametrize("method", sorted(ALLOWED_MISSES))
def test_reported_error_estimates_cover_the_actual_error(mgh_derivatives, method):
    """The error estimate is a promise about |numeric - exact| (DESIGN.md): checked here
    against the exact gradient, coordinate by coordinate, whatever the verdict says."""
    total, misses, beyond_twice = 0, [], []
    for p in PROBLEMS:
        x0 = np.array(p.x0)
        exact = mgh_derivatives.exact_gradient(p.name, x0)
        report = gk.compare_gradient(p.cost, x0, exact, method=method)
        assert len(report.rows) == p.n, report.to_text()
        for row in report.rows:
            total += 1
            actual = abs(row.numeric - exact[row.flat_index])
            if actual > row.error_estimate:
                misses.append((p.name, row.name, actual / row.error_estimate))
            if actual > 2 * row.error_estimate:
                beyond_twice.append((p.name, row.name, actual / row.error_estimate))
    assert total == sum(p.n for p in PROBLEMS) == 163
    assert len(misses) <= ALLOWED_MISSES[method], misses
    assert not beyond_twice, beyond_twice


@pytest.mark.parametrize("name", ["rosenbrock", "wood", "biggs_exp6", "extended_rosenbrock"])
def test_error_estimate_is_not_wildly_pessimistic(mgh_derivatives, name):
    """A useful estimate is within a few orders of the true error, not a blanket bound."""
    p = BY_NAME[name]
    x0 = np.array(p.x0)
    report = gk.compare_gradient(p.cost, x0, mgh_derivatives.exact_gradient(name, x0),
                                 method="richardson")
    g = np.max(np.abs([r.analytic for r in report.rows]))
    assert max(r.error_estimate for r in report.rows) < 1e-6 * g
