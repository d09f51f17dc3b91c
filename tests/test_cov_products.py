"""compare_jvp / compare_vjp / compare_hvp: bad input, failing functions, odd outputs.

Functions are small maps whose derivatives are common practice (d tanh = 1 - tanh^2,
d x^2 = 2x, linear maps); the tests read the messages, verdicts, rows and problems a
user sees.
"""
import numpy as np
import pytest

import gradcheck_kit as gk

X = np.array([0.3, -0.7])
A = np.array([[1.0, 2.0], [0.5, -1.0], [3.0, 0.25]])


def squares(x):
    return np.sum(x ** 2)


@pytest.mark.parametrize("call, message", [
    (lambda: gk.compare_jvp(3, X), "fun: expected a callable taking params, got int"),
    (lambda: gk.compare_jvp(np.tanh, X, 3), r"jvp: expected a function jvp\(params, v\) or None, "
                                            "got int"),
    (lambda: gk.compare_vjp(np.tanh, X, "u @ A"), r"vjp: expected a function vjp\(params, u\) or "
                                                  "None, got str"),
    (lambda: gk.compare_hvp(squares, X, 2.0, gradient=lambda x: 2 * x),
     r"hvp: expected a function hvp\(params, v\) or None, got float"),
    (lambda: gk.compare_hvp(None, X), "cost: expected a callable taking params, got NoneType"),
])
def test_things_that_are_not_functions_are_named(call, message):
    with pytest.raises(gk.CheckInputError, match=message):
        call()


@pytest.mark.parametrize("jvp, message", [
    (lambda x, v: np.array(["a", "b"]), "jvp: returned <U1 values; expected numbers"),
    (lambda x, v: v + 1j, "jvp: returned complex values; expected real numbers"),
    (lambda x, v: [[1.0, 2.0], [3.0]], "jvp: returned list; expected numbers shaped like fun's "
                                       "output"),
])
def test_a_product_of_the_wrong_kind_is_named(jvp, message):
    with pytest.raises(gk.CheckInputError, match=message):
        gk.compare_jvp(np.tanh, X, jvp, seed=0)


def test_failures_at_the_base_point_and_in_the_product_are_named():
    def broken(x):
        raise KeyError("weights")

    with pytest.raises(gk.CheckInputError, match="fun raised KeyError at the base point"):
        gk.compare_jvp(broken, X, lambda x, v: v, seed=0)

    def bad_product(x, v):
        raise ValueError("shape mismatch in the product")

    with pytest.raises(gk.CheckInputError, match="jvp raised ValueError at probe 1: shape "
                                                 "mismatch in the product"):
        gk.compare_jvp(np.tanh, X, bad_product, seed=0)


def test_a_function_that_fails_away_from_the_point_gives_error_rows():
    def only_at_the_point(x):
        if not np.array_equal(x, X):
            raise ValueError("out of range")
        return np.tanh(x)

    report = gk.compare_jvp(only_at_the_point, X, lambda x, v: (1 - np.tanh(x) ** 2) * v,
                            probes=2, seed=0)
    assert not report.passed
    assert [r.verdict for r in report.rows] == ["error", "error"]
    assert report.rows[0].detail.endswith("fun raised ValueError at probe 1: out of range")


def test_a_function_undefined_around_the_point_gives_non_finite_rows():
    def holey(x):
        return np.sum(x ** 2) if np.array_equal(x, X) else np.nan

    report = gk.compare_jvp(holey, X, lambda x, v: np.sum(2 * x * v), probes=2, seed=0)
    assert not report.passed
    assert {r.verdict for r in report.rows} == {"non-finite"}
    assert "not finite at the stencil points, even at the shorter step" in report.rows[0].detail


def test_a_stationary_point_decides_nothing_and_says_so():
    report = gk.compare_jvp(lambda x: x ** 2, np.zeros(2), lambda x, v: 2 * x * v, seed=0)
    assert {r.verdict for r in report.rows} == {"noisy"}
    assert "a stationary point, or a noisy function" in report.rows[0].detail


def test_a_scalar_function_names_its_rows_by_probe_only():
    report = gk.compare_jvp(lambda x: np.sum(np.sin(x)), X, lambda x, v: np.cos(x) @ v,
                            probes=2, seed=0)
    assert report.passed
    assert [r.name for r in report.rows] == ["v1", "v2"]
    assert str(report) == report.to_text()
    assert str(report).startswith("PASS jacobian-vector product check: 0 of 2 probes fail")


def test_vjp_of_a_scalar_function_gets_a_float_u():
    seen = []

    def vjp(x, u):
        seen.append(u)
        return u * np.cos(x)

    report = gk.compare_vjp(lambda x: np.sum(np.sin(x)), X, vjp, probes=2, seed=0)
    assert [r.verdict for r in report.rows] == ["agree", "agree"]
    assert all(isinstance(u, float) for u in seen)


def test_a_correct_vjp_of_a_scalar_function_passes():
    report = gk.compare_vjp(lambda x: np.sum(np.sin(x)), X, lambda x, u: u * np.cos(x),
                            probes=2, seed=0)
    assert report.passed, report.to_text()


def test_products_of_a_function_with_nested_outputs():
    def fun(x):
        return {"pair": [x[0] * x[1], np.tanh(x)], "sum": x[0] + x[1]}

    def jvp(x, v):
        return {"pair": [v[0] * x[1] + x[0] * v[1], (1 - np.tanh(x) ** 2) * v],
                "sum": v[0] + v[1]}

    def vjp(x, u):
        a, t = u["pair"]
        return np.array([a * x[1], a * x[0]]) + (1 - np.tanh(x) ** 2) * t + u["sum"]

    assert gk.compare_jvp(fun, X, jvp, seed=0).passed
    assert gk.compare_vjp(fun, X, vjp, seed=0).passed
    wrong = gk.compare_jvp(fun, X, lambda x, v: {**jvp(x, v), "sum": v[0] - v[1]}, seed=0)
    assert not wrong.passed
    assert all("sum" in r.name for r in wrong.rows if r.failing)


def test_a_random_function_is_named_a_problem():
    rng = np.random.default_rng(0)
    report = gk.compare_jvp(lambda x: A @ x + 1e-3 * rng.standard_normal(3), X,
                            lambda x, v: A @ v, seed=0)
    assert not report.passed
    assert any("fun is not deterministic" in p for p in report.problems)


def test_float32_params_get_a_note():
    x = X.astype(np.float32)
    report = gk.compare_jvp(lambda x: A @ x, x, lambda x, v: A @ v, seed=0)
    assert any("stored in lower precision" in n and "x + t v exactly" in n for n in report.notes)


def test_a_correct_jvp_at_float32_params_passes():
    report = gk.compare_jvp(lambda x: A @ x, X.astype(np.float32), lambda x, v: A @ v, seed=0)
    assert report.passed, report.to_text()


def test_a_constant_map_with_a_zero_product_is_not_said_to_ignore_v():
    report = gk.compare_jvp(lambda x: np.ones(3), X, lambda x, v: np.zeros(3), seed=0)
    assert not any("ignores its argument" in p for p in report.problems)


def test_one_probe_cannot_tell_whether_the_product_ignores_v():
    report = gk.compare_jvp(lambda x: A @ x, X, lambda x, v: A @ np.ones(2), probes=1, seed=0)
    assert not report.passed
    assert not any("ignores its argument" in p for p in report.problems)


@pytest.mark.parametrize("call, message", [
    (lambda f: gk.compare_jvp(f, X, seed=0), "jvp=None: autograd could not differentiate fun"),
    (lambda f: gk.compare_vjp(f, X, seed=0), "vjp=None: autograd could not differentiate fun"),
    (lambda f: gk.compare_hvp(f, X, seed=0), "gradient=None: autograd could not differentiate "
                                             "the cost"),
    (lambda f: gk.compare_hvp(f, X, gradient=lambda x: 2 * x, seed=0),
     "hvp=None: autograd could not differentiate the cost"),
])
def test_autograd_failures_say_which_product_to_pass(call, message):
    def untraceable(x):
        return float(x[0]) ** 2 + float(x[1]) ** 2

    with pytest.raises(gk.CheckInputError, match=message):
        call(untraceable)


def test_autograd_products_of_nested_outputs_agree():
    import autograd.numpy as anp

    def fun(x):
        return [anp.tanh(x), (x[0] * x[1],)]

    assert gk.compare_jvp(fun, X, seed=0).passed
    assert gk.compare_vjp(fun, X, seed=0).passed


def test_hvp_of_a_single_float_parameter():
    # d^2/dx^2 x^4 = 12 x^2 (common practice); params and products are plain floats
    report = gk.compare_hvp(lambda x: x ** 4, 0.5, lambda x, v: 12 * x ** 2 * v,
                            gradient=lambda x: 4 * x ** 3, seed=0)
    assert report.passed
    wrong = gk.compare_hvp(lambda x: x ** 4, 0.5, lambda x, v: 6 * x ** 2 * v,
                           gradient=lambda x: 4 * x ** 3, seed=0)
    assert not wrong.passed
