"""Bad input: one clear message naming the argument, expected versus got."""
import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit import CheckInputError


def quad(p):
    return np.sum(p["W"] ** 2) + np.sum(p["b"] ** 2)


def quad_grad(p):
    return {"W": 2 * p["W"], "b": 2 * p["b"]}


PARAMS = {"W": np.ones((3, 2)), "b": np.zeros(2)}


def message(**kwargs):
    call = kwargs.pop("call", gk.compare_gradient)
    with pytest.raises(CheckInputError) as info:
        call(**kwargs)
    return str(info.value), info.value


def test_gradient_of_the_wrong_shape_names_parameter_expected_and_got():
    text, _ = message(cost=quad, params=PARAMS, gradient=lambda p: {"W": np.ones((2, 3)),
                                                                      "b": np.zeros(2)})
    assert "'W'" in text and "(3, 2)" in text and "(2, 3)" in text


def test_gradient_of_the_wrong_structure_lists_the_leaves():
    text, _ = message(cost=quad, params=PARAMS, gradient=lambda p: {"W": np.ones((3, 2))})
    assert "structure" in text and "'b'" in text


def test_array_gradient_for_a_bare_array():
    report = gk.compare_gradient(lambda x: np.sum(x ** 2), np.arange(3.0), [0.0, 2.0, 4.0])
    assert report.passed


def test_non_scalar_cost():
    text, _ = message(cost=lambda p: p["W"] ** 2, params=PARAMS, gradient=quad_grad)
    assert "shape (3, 2)" in text and "scalar" in text


def test_cost_raising_at_the_base_point_chains_the_users_error():
    def broken(p):
        raise ZeroDivisionError("bad batch")
    text, err = message(cost=broken, params=PARAMS, gradient=quad_grad)
    assert "ZeroDivisionError" in text and "bad batch" in text
    assert isinstance(err.__cause__, ZeroDivisionError)


@pytest.mark.parametrize("value", [np.nan, np.inf])
def test_cost_not_finite_at_the_base_point(value):
    text, _ = message(cost=lambda p: value, params=PARAMS, gradient=quad_grad)
    assert "finite" in text


def test_gradient_function_raising_is_reported():
    def bad_grad(p):
        raise KeyError("W2")
    text, err = message(cost=quad, params=PARAMS, gradient=bad_grad)
    assert "gradient function raised KeyError" in text and isinstance(err.__cause__, KeyError)


def test_empty_params():
    text, _ = message(cost=quad, params={}, gradient=quad_grad)
    assert "no parameters" in text


@pytest.mark.parametrize("kwargs, words", [
    ({"method": "secant"}, "method"), ({"rtol": -1}, "rtol"), ({"atol": "1e-3"}, "atol"),
    ({"coordinates": 0}, "coordinates"), ({"coordinates": {"Q": [0]}}, "no parameter named"),
    ({"coordinates": {"W": [(5, 0)]}}, "out of range"), ({"step": -1.0}, "step"),
    ({"executor": "pool"}, "executor"), ({"seed": 1.5}, "seed"), ({"progress": "yes"}, "progress"),
    ({"vectorized": 1}, "vectorized")])
def test_bad_options_name_themselves(kwargs, words):
    text, _ = message(cost=quad, params=PARAMS, gradient=quad_grad, **kwargs)
    assert words in text


def test_cost_not_callable():
    text, _ = message(cost=3.0, params=PARAMS, gradient=quad_grad)
    assert "cost" in text and "callable" in text


def test_autograd_failure_says_how_to_get_out():
    def plain_numpy(p):
        return float(np.sum(np.asarray(p["W"], dtype=float) ** 2))  # float() blocks autograd
    text, _ = message(cost=plain_numpy, params={"W": np.ones(2)})
    assert "autograd" in text and "gradient=" in text


def test_numeric_gradient_validates_too():
    text, _ = message(call=gk.numeric_gradient, cost=quad, params=PARAMS, method="auto-ish")
    assert "method" in text


def test_a_cost_failing_near_the_base_point_gives_error_rows_not_a_crash():
    def fragile(p):
        if p["W"][0, 0] > 1.0:
            raise ValueError("outside the table")
        return quad(p)
    report = gk.compare_gradient(fragile, PARAMS, quad_grad, method="central")
    errors = [r for r in report.rows if r.verdict == "error"]
    assert [r.name for r in errors] == ["W[0, 0]"]
    assert "outside the table" in errors[0].detail and not report.passed


def test_gradient_dict_in_another_key_order_is_matched_by_key():
    report = gk.compare_gradient(quad, PARAMS, lambda p: {"b": 2 * p["b"], "W": 2 * p["W"]})
    assert report.passed and {r.parameter for r in report.rows} == {"W", "b"}


def forgot_to_return(p):
    {"W": 2 * p["W"], "b": 2 * p["b"]}    # no return statement


@pytest.mark.parametrize("params, expected", [
    (PARAMS, "expected a dict with keys ['W', 'b'] (leaves ['W', 'b']), like params"),
    (np.ones(3), "expected an array of shape (3,), like params"),
    (1.5, "expected a number, like params")])
def test_a_gradient_function_returning_none_says_so(params, expected):
    cost = quad if isinstance(params, dict) else (lambda x: float(np.sum(x ** 2)))
    gradient = forgot_to_return if isinstance(params, dict) else (lambda x: None)
    text, error = message(cost=cost, params=params, gradient=gradient)
    assert isinstance(error, gk.CheckTypeError)
    assert text == ("the gradient function returned None (a missing return statement?); "
                    + expected)


def test_a_misspelt_option_names_the_nearest_one_like_a_case_does():
    text, error = message(call=gk.assert_gradient_matches, cost=quad, params=PARAMS,
                          gradient=quad_grad, methd="central")
    assert isinstance(error, TypeError)
    assert text == "assert_gradient_matches: unknown option 'methd'; did you mean 'method'?"
    with pytest.raises(CheckInputError, match="case: unknown option 'methd'; did you mean "
                                              "'method'\\? Expected examples, name"):
        gk.case(quad_grad, params=PARAMS, methd="central")
    text, _ = message(call=gk.assert_gradient_matches, cost=quad, params=PARAMS,
                      gradient=quad_grad, qqqq=1)
    assert text.startswith("assert_gradient_matches: unknown option 'qqqq'; expected one of "
                           "method, step, rtol, atol")
