"""Property tests: numeric derivatives stay within their reported error estimates,
the complex step is exact to rounding, and callers' arrays are never changed."""
import copy

import mpmath
import numpy as np
import pytest
import sympy
from hypothesis import assume, given
from hypothesis import strategies as st

import gradcheck_kit as gk
from gradcheck_kit.tree import leaves_of
from test_tree import same_tree, trees

# Methods whose error estimate is measured (an embedded lower-order value, or the complex
# step's negligible truncation).  Central's estimate is a model of f3 from f1 and f2 and
# can miss an inflection point where both vanish (x^3 at 0): it gets a looser property.
ACCURATE = ["richardson", "five-point", "complex-step"]


def rows_by_index(report):
    return {r.flat_index: r for r in report.rows}


# --- random polynomials ----------------------------------------------------------------
coefficients = st.lists(st.floats(-10, 10), min_size=1, max_size=7)
points = st.floats(-3, 3)


@given(st.lists(coefficients, min_size=1, max_size=3), st.lists(points, min_size=3, max_size=3),
       st.floats(-2, 2), st.sampled_from(ACCURATE))
def test_polynomial_derivatives_lie_within_the_error_estimate(polys, xs, mix, method):
    """cost = sum_i p_i(x_i) + mix * x_0 * x_1; exact derivative from mpmath at 50 digits."""
    n = len(polys)
    x = np.array(xs[:n])

    def cost(v):
        total = sum(sum(c * v[i] ** k for k, c in enumerate(p)) for i, p in enumerate(polys))
        return total + (mix * v[0] * v[1] if n > 1 else 0.0)

    with mpmath.workdps(50):
        xm = [mpmath.mpf(float(v)) for v in x]
        exact = []
        for i, p in enumerate(polys):
            d = sum(k * mpmath.mpf(c) * xm[i] ** (k - 1) for k, c in enumerate(p) if k)
            if n > 1 and i < 2:
                d += mpmath.mpf(mix) * xm[1 - i]
            exact.append(float(d))
    report = gk.compare_gradient(cost, x, np.array(exact), method=method)
    assert report.passed, report.to_text()
    # 1e-30: the complex step's own O(h^2) = O(1e-40) truncation, left unmodelled where a
    # cubic term meets a zero gradient (e.g. x^3 at 0 gives -1e-40 for 0).
    for i, row in rows_by_index(report).items():
        assert abs(row.numeric - exact[i]) <= 2 * row.error_estimate + 1e-30, (i, row)


@given(st.lists(coefficients, min_size=1, max_size=3), st.lists(points, min_size=3, max_size=3))
def test_central_differences_of_polynomials_are_accurate_to_the_textbook_order(polys, xs):
    """Nocedal & Wright, Numerical Optimization, 2nd ed., section 8.1: central differences
    with h ~ eps^(1/3) leave errors of about eps^(2/3) relative to the function's size;
    1e-6 of that size is a generous bound (the sharp one is in test_mgh_accuracy.py)."""
    n = len(polys)
    x = np.array(xs[:n])

    def cost(v):
        return sum(sum(c * v[i] ** k for k, c in enumerate(p)) for i, p in enumerate(polys))

    exact = np.array([sum(k * c * x[i] ** (k - 1) for k, c in enumerate(p) if k)
                      for i, p in enumerate(polys)])
    size = sum(abs(c) * 3.0 ** k for p in polys for k, c in enumerate(p)) + 1.0
    numeric = gk.numeric_gradient(cost, x, method="central")
    assert np.all(np.abs(numeric - exact) <= 1e-6 * size)


# --- random smooth expressions, differentiated by sympy -------------------------------------
X, Y = sympy.symbols("x y")
UNARY = [sympy.sin, sympy.exp, sympy.tanh, lambda e: sympy.log(1 + e ** 2),
         lambda e: sympy.sqrt(1 + e ** 2), sympy.cos]
BINARY = [lambda a, b: a * b, lambda a, b: a + b, lambda a, b: a / (1 + b ** 2),
          lambda a, b: a - 2 * b]


@st.composite
def expressions(draw, depth=3):
    if depth == 0 or draw(st.booleans()) and depth < 3:
        return draw(st.sampled_from([X, Y, X + Y, 2 * X - Y]))
    if draw(st.booleans()):
        return draw(st.sampled_from(UNARY))(draw(expressions(depth - 1)))
    return draw(st.sampled_from(BINARY))(draw(expressions(depth - 1)), draw(expressions(depth - 1)))


@given(expressions(), st.floats(-1.5, 1.5), st.floats(-1.5, 1.5),
       st.sampled_from(["richardson", "complex-step"]))
def test_sympy_expressions_within_the_error_estimate(expr, x, y, method):
    f = sympy.lambdify((X, Y), expr, "numpy")
    f_exact = sympy.lambdify((X, Y), expr, "mpmath")
    grads = [sympy.lambdify((X, Y), sympy.diff(expr, v), "mpmath") for v in (X, Y)]
    with mpmath.workdps(40):
        exact = np.array([float(g(mpmath.mpf(x), mpmath.mpf(y))) for g in grads])
        # The property is about the differences, not about a cost whose own float64
        # evaluation is inaccurate (log(1 + u) for tiny u loses all digits of u): where
        # it is, near the point, the example is skipped.
        for dx, dy in ((0, 0), (1e-3, 1e-3), (-1e-3, -1e-3)):
            true = float(f_exact(mpmath.mpf(x + dx), mpmath.mpf(y + dy)))
            assume(abs(f(x + dx, y + dy) - true) <= 1e-12 * abs(true) + 1e-300)
    # Overflowing or huge derivatives (exp of exp) are outside the property's range.
    assume(np.all(np.isfinite(exact)) and np.max(np.abs(exact)) <= 1e8)

    def cost(v):
        return f(v[0], v[1]) + 0 * v[0]  # keeps a constant expression an array function

    report = gk.compare_gradient(cost, np.array([x, y]), exact, method=method)
    for i, row in rows_by_index(report).items():
        assert abs(row.numeric - exact[i]) <= 2 * row.error_estimate + 1000 * 2.2e-16 * (
            abs(exact[i]) + np.max(np.abs(exact))), (expr, i, row)


# --- the Lyness-Moler function ------------------------------------------------------------
# Lyness & Moler, "Numerical differentiation of analytic functions", SIAM J. Numer. Anal.
# 4(2), 1967, introduced e^x / sqrt(sin^3 x + cos^3 x) as a test of numeric derivatives;
# Squire & Trapp (below) reuse it for the complex step (both from memory).
def lyness_moler(x):
    """The Lyness & Moler test function."""
    return np.exp(x) / np.sqrt(np.sin(x) ** 3 + np.cos(x) ** 3)


T = sympy.symbols("t")
LM_DERIVATIVE = sympy.lambdify(
    T, sympy.diff(sympy.exp(T) / sympy.sqrt(sympy.sin(T) ** 3 + sympy.cos(T) ** 3), T), "mpmath")


def lm_exact(x):
    with mpmath.workdps(40):
        return float(LM_DERIVATIVE(mpmath.mpf(x)))


@given(st.floats(-0.5, 1.5))
def test_complex_step_on_lyness_moler_is_exact_to_rounding(x):
    """Squire & Trapp, SIAM Review 40(1), 1998: the complex step differentiates the
    Lyness & Moler function e^x / sqrt(sin^3 x + cos^3 x) to machine precision (their
    example point is x = 1.5, from memory); checked here on [-0.5, 1.5] against sympy's
    derivative evaluated by mpmath at 40 digits."""
    d = gk.numeric_gradient(lambda v: lyness_moler(v[0]), np.array([x]), method="complex-step")
    exact = lm_exact(x)
    # relative to max(|f'|, |f|): near the zero of f' at x = -0.41 only absolute accuracy exists
    assert abs(d[0] - exact) <= 8 * np.finfo(float).eps * max(abs(exact), lyness_moler(x))


def test_complex_step_needs_no_step_tuning_where_central_breaks_down():
    """Squire & Trapp, Fig. 1 (from memory: the central difference error on the Lyness &
    Moler function grows as h shrinks below about 1e-5, from rounding, while the complex
    step stays exact to h = 1e-100); checked here at h = 1e-12 against the exact value."""
    x = np.array([1.5])
    exact = lm_exact(1.5)
    complex_err = abs(gk.numeric_gradient(lambda v: lyness_moler(v[0]), x,
                                          method="complex-step", step=1e-100)[0] - exact)
    central_err = abs(gk.numeric_gradient(lambda v: lyness_moler(v[0]), x,
                                          method="central", step=1e-12)[0] - exact)
    assert complex_err <= 4 * np.finfo(float).eps * abs(exact)
    assert central_err > 1e3 * complex_err + 1e-6


# --- the caller's data is never changed ---------------------------------------------------------
def square_cost(tree):
    total = 0.0
    for leaf in leaves_of(tree):
        total = total + np.sum(np.asarray(leaf, dtype=float) ** 2)
    return total


@given(trees, st.sampled_from(["auto", "central", "richardson"]))
def test_compare_gradient_never_changes_the_callers_params(tree, method):
    before = copy.deepcopy(tree)
    gk.compare_gradient(square_cost, tree, lambda p: _scaled(p, 2.0), method=method)
    assert same_tree(tree, before)


def _scaled(tree, c):
    if isinstance(tree, dict):
        return {k: _scaled(v, c) for k, v in tree.items()}
    if isinstance(tree, (list, tuple)):
        return type(tree)(_scaled(v, c) for v in tree)
    return c * np.asarray(tree, dtype=float)


def test_a_cost_that_edits_its_input_cannot_reach_the_caller():
    params = {"W": np.ones((2, 2)), "b": np.zeros(2)}
    before = copy.deepcopy(params)

    def editing_cost(p):
        value = np.sum(p["W"] ** 2) + np.sum(p["b"] ** 2)
        p["W"] *= 3.0
        p["b"] += 1.0
        return value

    def editing_gradient(p):
        g = {"W": 2 * p["W"], "b": 2 * p["b"]}
        p["W"][:] = -1.0
        return g

    gk.compare_gradient(editing_cost, params, editing_gradient)
    gk.numeric_gradient(editing_cost, params)
    assert same_tree(params, before)


@pytest.mark.parametrize("method", ["central", "complex-step", "richardson"])
def test_numeric_gradient_returns_the_structure_of_params(method):
    params = {"W": np.ones((2, 3), dtype=np.float32), "layers": [np.arange(3.0), 0.5]}

    def cost(p):  # W is stored in float32 but used in float64, so the cost is smooth
        w = p["W"].astype(np.result_type(p["W"], np.float64))
        return np.sum(w ** 2) + np.sum(p["layers"][0] ** 3) + p["layers"][1] ** 2

    g = gk.numeric_gradient(cost, params, method=method)
    assert g["W"].shape == (2, 3) and g["W"].dtype == np.float32
    assert isinstance(g["layers"], list) and isinstance(g["layers"][1], float)
    np.testing.assert_allclose(g["layers"][0], 3 * np.arange(3.0) ** 2, rtol=1e-6, atol=1e-9)
    assert abs(g["layers"][1] - 1.0) < 1e-6
