"""Retries of numeric.py where a stencil meets points at which the cost is not finite.

Costs here are sums of squares (d/dx x^2 = 2x: common practice) cut off where a
simulation or a table would stop being defined; the checks read what a user sees:
the verdict, the numeric value and the row's text.
"""
import warnings

import numpy as np
import pytest

import gradcheck_kit as gk

X = np.array([1.0, 2.0])


def _squares(x):
    return float(np.sum(x ** 2))


def defined_right_of_one(x):
    """Like sqrt(x - 1) * 0 + |x|^2: no value left of x[0] = 1."""
    return _squares(x) if x[0] >= 1.0 else float("nan")


def defined_left_of_one(x):
    return _squares(x) if x[0] <= 1.0 else float("nan")


def defined_only_at_one(x):
    return _squares(x) if x[0] == 1.0 else float("nan")


def undefined_just_below_one(x):
    """Not finite only further than 1e-7 below x[0] = 1: a shorter step fits."""
    return _squares(x) if x[0] >= 1.0 - 1e-7 else float("nan")


def _row(report, name):
    return next(row for row in report.rows if row.name == name)


@pytest.mark.parametrize("method", ["central", "five-point", "richardson"])
def test_one_sided_forward_differences_where_the_left_side_is_undefined(method):
    report = gk.compare_gradient(defined_right_of_one, X, lambda x: 2 * x, method=method)
    assert report.passed
    row = _row(report, "x[0]")
    assert row.verdict == "agree"
    assert row.numeric == pytest.approx(2.0, rel=1e-6)
    line = next(s for s in report.to_text().splitlines() if s.strip().startswith("x[0]"))
    assert "forward differences used" in line and "not finite at x-" in line
    # the coordinate whose stencil was fine is left as it was
    assert "differences used" not in \
        next(s for s in report.to_text().splitlines() if s.strip().startswith("x[1]"))
    assert any("redone with shorter steps or one-sided differences" in n for n in report.notes)


def test_one_sided_backward_differences_where_the_right_side_is_undefined():
    report = gk.compare_gradient(defined_left_of_one, X, lambda x: 2 * x, method="central")
    assert report.passed
    assert _row(report, "x[0]").numeric == pytest.approx(2.0, rel=1e-6)
    assert "backward differences used" in report.to_text()
    assert "not finite at x+" in report.to_text()


def test_one_sided_differences_still_find_a_wrong_gradient():
    report = gk.compare_gradient(defined_left_of_one, X, lambda x: 3 * x, method="central")
    assert not report.passed
    assert _row(report, "x[0]").verdict == "disagree"
    assert _row(report, "x[0]").numeric == pytest.approx(2.0, rel=1e-6)


@pytest.mark.parametrize("method", ["central", "richardson"])
def test_a_cost_undefined_on_both_sides_gives_non_finite_with_the_reason(method):
    report = gk.compare_gradient(defined_only_at_one, X, lambda x: 2 * x, method=method)
    assert not report.passed
    row = _row(report, "x[0]")
    assert row.verdict == "non-finite"
    assert np.isnan(row.numeric)
    assert "on both sides at every shorter step tried" in report.to_text()
    assert _row(report, "x[1]").verdict == "agree"


def test_a_shorter_step_is_used_where_it_reaches_only_defined_points():
    report = gk.compare_gradient(undefined_just_below_one, X, lambda x: 2 * x, method="central")
    assert report.passed
    row = _row(report, "x[0]")
    assert row.numeric == pytest.approx(2.0, rel=1e-6)
    text = report.to_text()
    assert "step shortened to" in text and "differences used" not in text


def test_numeric_gradient_uses_one_sided_differences_without_a_warning():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        g = gk.numeric_gradient(defined_left_of_one, X.copy())
    np.testing.assert_allclose(g, [2.0, 4.0], rtol=1e-6)


def test_numeric_gradient_is_nan_where_the_cost_is_defined_only_at_the_point():
    g = gk.numeric_gradient(defined_only_at_one, X.copy())
    assert np.isnan(g[0]) and g[1] == pytest.approx(4.0, rel=1e-6)


@pytest.mark.parametrize("method", ["richardson", "auto"])
def test_the_points_named_as_not_finite_are_where_the_cost_is_not_finite(method):
    # A log barrier with its slack at 1e-10: the first stencil crosses 0, a shorter step
    # is taken, and the detail must name the first stencil's points (where the cost was
    # not finite), not the shorter step's (where it is finite).
    x = np.array([4150.0, 1e-10, 0.35])

    def cost(v):
        with np.errstate(invalid="ignore", divide="ignore"):
            return 1e-3 * v[0] ** 2 - np.log(v[1]) + v[2] ** 2
    report = gk.compare_gradient(cost, x, lambda v: np.array([2e-3 * v[0], -1 / v[1],
                                                              2 * v[2]]), method=method)
    assert report.passed, report.to_text()
    detail = _row(report, "x[1]").detail
    named = detail.split("not finite at ")[1].split(":")[0].split(", ")
    assert named, detail
    for point in named:
        shifted = x.copy()
        shifted[1] += float(point[1:])
        assert not np.isfinite(cost(shifted)), (point, detail)
