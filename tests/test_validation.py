"""One validation layer for every public check: TypeError for wrong types, ValueError for
wrong values, each message naming the option, what was expected and what was got, before
the cost is called, and never a changed user array."""
import copy
import warnings

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit import CheckInputError, CheckTypeError
from gradcheck_kit import plan

X = np.array([1.0, 2.0, 3.0])


class Counted:
    def __init__(self):
        self.calls = 0

    def __call__(self, x):
        self.calls += 1
        return float(np.sum(x ** 2))


def grad(x):
    return 2 * x


def jacobian_entry(cost, params, **options):
    return gk.compare_jacobian(lambda x: np.atleast_1d(cost(x)), params, **options)


ENTRY_POINTS = {
    "compare": lambda cost, params, **o: gk.compare_gradient(cost, params, grad, **o),
    "numeric": lambda cost, params, **o: gk.numeric_gradient(cost, params, **o),
    "assert": lambda cost, params, **o: gk.assert_gradient_matches(cost, params, grad, **o),
    "jacobian": lambda cost, params, **o: jacobian_entry(cost, params, **o),
    "locate": lambda cost, params, **o: gk.locate_mismatches(cost, params, grad, **o),
    "remainder": lambda cost, params, **o: gk.remainder_order(cost, params, grad, **o),
    "noise": lambda cost, params, **o: gk.estimate_noise(cost, params, **o),
}
# the options each entry point takes, for the table of bad values below
TAKES = {
    "compare": {"seed", "method", "progress", "step", "rtol", "coordinates", "executor"},
    "numeric": {"method", "step", "executor"},
    "assert": {"seed", "method", "progress", "step", "rtol", "coordinates", "executor"},
    "jacobian": {"seed", "method", "progress", "step", "rtol", "coordinates", "executor"},
    "locate": {"seed", "method", "progress", "budget", "executor"},
    "remainder": {"seed"},
    "noise": set(),
}
BAD = [  # (option, value, expected exception, words in the message)
    ("seed", -1, CheckInputError, ["seed", "int >= 0", "-1"]),
    ("seed", 1.5, CheckTypeError, ["seed", "1.5 (float)"]),
    ("seed", "7", CheckTypeError, ["seed", "'7'"]),
    ("method", "bogus", CheckInputError, ["method", "'bogus'", "'central'"]),
    ("method", 3, CheckTypeError, ["method", "a str", "3 (int)"]),
    ("progress", "yes", CheckTypeError, ["progress", "True, False or None", "'yes'"]),
    ("budget", True, CheckTypeError, ["budget", "int >= 1", "True"]),
    ("budget", 0, CheckInputError, ["budget", "got 0"]),
    ("step", "small", CheckTypeError, ["step", "'small'"]),
    ("step", 0.0, CheckInputError, ["step", "> 0"]),
    ("rtol", "1e-3", CheckTypeError, ["rtol", "'1e-3'"]),
    ("rtol", -1.0, CheckInputError, ["rtol", ">= 0"]),
    ("coordinates", True, CheckTypeError, ["coordinates", "True"]),
    ("coordinates", 0, CheckInputError, ["coordinates", "int >= 1"]),
    ("executor", "pool", CheckTypeError, ["executor", "'pool'"]),
]
CASES = [(entry, option, value, error, words) for entry in ENTRY_POINTS
         for option, value, error, words in BAD if option in TAKES[entry]]


@pytest.mark.parametrize("entry, option, value, error, words", CASES,
                         ids=[f"{c[0]}-{c[1]}={c[2]!r}" for c in CASES])
def test_bad_options_are_refused_before_the_cost_runs(entry, option, value, error, words):
    cost = Counted()
    params = X.copy()
    with pytest.raises(error) as info:
        ENTRY_POINTS[entry](cost, params, **{option: value})
    text = str(info.value)
    assert all(w in text for w in words), text
    # a wrong type is a TypeError, and every input problem a ValueError subclass
    assert isinstance(info.value, TypeError) == (error is CheckTypeError)
    assert isinstance(info.value, CheckInputError)
    assert cost.calls == 0 and np.array_equal(params, X)


def test_an_unknown_method_suggests_the_near_one():
    with pytest.raises(CheckInputError, match="did you mean 'central'"):
        gk.locate_mismatches(Counted(), X, grad, method="centre")


@pytest.mark.parametrize("call", ["compare", "numeric", "remainder", "noise", "locate"])
def test_a_cost_that_is_not_callable_is_a_type_error(call):
    with pytest.raises(CheckTypeError, match=r"cost: expected a callable taking params, got "
                                             r"'loss' \(str\)|got 'loss'"):
        ENTRY_POINTS[call]("loss", X)


def test_jacobian_that_is_a_string_is_a_type_error_before_fun_runs():
    fun = Counted()
    with pytest.raises(CheckTypeError, match="jacobian: expected None .* got str"):
        gk.compare_jacobian(lambda x: np.atleast_1d(fun(x)), X, "abc")
    assert fun.calls == 0


def test_gradient_that_is_a_string_is_a_type_error_before_the_cost_runs():
    cost = Counted()
    with pytest.raises(CheckTypeError, match="gradient: expected None"):
        gk.compare_gradient(cost, X, "2*x")
    assert cost.calls == 0


def test_unknown_option_of_a_jacobian_check_names_the_near_one():
    with pytest.raises(TypeError, match="compare_jacobian: unknown option 'metod'; did you "
                                        "mean 'method'"):
        gk.compare_jacobian(lambda x: x ** 2, X, metod="central")


def test_check_options_is_the_shared_layer_for_the_front_ends():
    # what the plugin and the command line call for a declaration's or a command's options
    assert plan.check_options("case: ", seed=3, rtol=1e-6) == {"seed": 3, "rtol": 1e-6}
    with pytest.raises(CheckInputError, match="^case: seed: expected an int >= 0"):
        plan.check_options("case: ", seed=-1)
    with pytest.raises(CheckTypeError, match="^case: progress:"):
        plan.check_options("case: ", progress="yes")


def test_a_case_declaration_with_a_negative_seed_is_refused_when_applied():
    with pytest.raises(CheckInputError, match="seed"):
        gk.case(grad, params=X, seed=-1)


# --- steps that rounding would swallow -----------------------------------------------------

def test_a_step_lost_to_rounding_is_refused_not_turned_into_zeros():
    # at x = 1, 1 + 1e-300 == 1 in float64: the difference would be 0 and the gradient 0
    cost = Counted()
    with pytest.raises(CheckInputError) as info:
        gk.numeric_gradient(cost, X, step=1e-300)
    text = str(info.value)
    assert "step: 1e-300 is lost to rounding at x[0] = 1.0 (float64)" in text
    assert "step=None" in text
    with pytest.raises(CheckInputError, match="lost to rounding"):
        gk.compare_gradient(cost, X, grad, method="central", step=1e-300)


def test_a_step_too_small_for_float32_parameters_is_refused():
    # float32 spacing at 1.0 is 2^-23, about 1.2e-7 (a fact of IEEE single precision)
    params = {"w": np.ones(3, dtype=np.float32)}
    with pytest.raises(CheckInputError, match=r"w\[0\] = 1.0 \(float32\)"):
        gk.numeric_gradient(lambda p: float(np.sum(p["w"] ** 2)), params, step=1e-9)


def test_ordinary_steps_are_still_accepted():
    g = gk.numeric_gradient(lambda x: float(np.sum(x ** 2)), X, step=1e-6)
    assert np.allclose(g, 2 * X, rtol=1e-6)


# --- structures: masks, names ------------------------------------------------------------------

def test_masked_params_are_refused_and_left_as_they_were():
    params = np.ma.array([1.0, 2.0, 3.0], mask=[False, True, False])
    before = copy.deepcopy(params)
    with pytest.raises(CheckTypeError) as info:
        gk.compare_gradient(lambda x: float(np.sum(x ** 2)), params, grad)
    text = str(info.value)
    assert "params leaf 'x' is a masked array" in text and ".filled(" in text
    assert np.array_equal(params.data, before.data) and np.array_equal(params.mask, before.mask)


def test_a_masked_gradient_is_refused():
    masked = np.ma.array(2 * X, mask=[False, True, False])
    with pytest.raises(CheckTypeError, match="masked"):
        gk.compare_gradient(lambda x: float(np.sum(x ** 2)), X, masked)


def test_keys_one_and_string_one_would_share_a_name():
    params = {1: 1.0, "1": 2.0}
    with pytest.raises(CheckInputError) as info:
        gk.compare_gradient(lambda p: p[1] ** 2 + p["1"] ** 2, params,
                            lambda p: {1: 2 * p[1], "1": 2 * p["1"]})
    assert "params[1] and params['1'] would both be named '1'" in str(info.value)


def test_a_dotted_key_beside_a_nested_one_would_share_a_name():
    params = {"a.b": 1.0, "a": {"b": 2.0}}
    with pytest.raises(CheckInputError) as info:
        gk.numeric_gradient(lambda p: p["a.b"] ** 2 + p["a"]["b"] ** 2, params)
    assert "params['a.b'] and params['a']['b'] would both be named 'a.b'" in str(info.value)


# --- messages that say what came back ----------------------------------------------------------

def test_the_vectorized_shape_error_says_what_was_expected_and_what_came_back():
    with pytest.raises(CheckInputError) as info:
        gk.compare_gradient(lambda b: np.sum(b ** 2), X, grad, vectorized=True)
    text = str(info.value)
    assert "returned shape () for a batch of 1 point" in text and "expected shape (1,)" in text
    assert "return a scalar" not in text        # the old advice contradicted the request


def test_the_progress_bar_names_the_cost(capsys):
    def ridge_penalty(x):
        return float(np.sum(x ** 2))
    gk.compare_gradient(ridge_penalty, X, grad, method="central", progress=True)
    assert "ridge_penalty: central differences" in capsys.readouterr().err


def test_library_code_does_not_print_warnings_go_through_warnings(capfd):
    def undefined_far_out(x):       # fails at a stencil point: a warning, not a print
        if x[0] > 1.0:
            raise ValueError("outside the domain")
        return float(np.sum(x ** 2))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        gk.numeric_gradient(undefined_far_out, X, method="central")
    out, err = capfd.readouterr()
    assert out == "" and err == ""
    assert any("numeric_gradient" in str(w.message) for w in caught)


def test_a_nan_in_params_is_named_when_the_cost_is_not_finite_there():
    params = {"a": np.ones(2), "b": np.array([np.nan, 1.0])}
    kept = copy.deepcopy(params)
    with pytest.raises(CheckInputError, match=r"cost returned nan at the base point.*"
                                              r"params hold non-finite entries: b\[0\]"):
        gk.compare_gradient(lambda p: np.sum(p["a"]) + np.sum(p["b"]), params,
                            lambda p: {"a": np.ones(2), "b": np.ones(2)})
    assert np.array_equal(params["b"], kept["b"], equal_nan=True)


def test_a_gradient_dict_for_a_bare_array_says_both_structures():
    with pytest.raises(CheckInputError, match=r"gradient has a different structure from "
                                              r"params: expected a bare array, got a dict "
                                              r"with keys \['x'\]"):
        gk.compare_gradient(lambda x: np.sum(x ** 2), np.ones(3), {"x": np.ones(3)})


def test_a_gradient_with_other_keys_names_the_keys_of_both():
    with pytest.raises(CheckInputError, match=r"expected a dict with keys \['a', 'b'\].*"
                                              r"got a dict with keys \['a', 'c'\]"):
        gk.compare_gradient(lambda p: np.sum(p["a"]) + np.sum(p["b"]),
                            {"a": np.ones(2), "b": np.ones(2)},
                            lambda p: {"a": np.ones(2), "c": np.ones(2)})


def test_gradient_passed_in_params_place_says_the_order():
    # A function where params belong: the message names params (not a leaf 'x') and
    # says the order of the arguments.
    with pytest.raises(gk.CheckTypeError) as info:
        gk.compare_gradient(lambda w: np.sum(w ** 2), lambda w: 2 * w, np.ones(3))
    text = str(info.value)
    assert text.startswith("params is a function")
    assert "cost, params, gradient" in text
    with pytest.raises(gk.CheckTypeError) as info:
        gk.compare_gradient(lambda w: 0.0, {"a": lambda w: w}, None)
    assert "params leaf 'a' is a function" in str(info.value)
    assert "cost, params, gradient" not in str(info.value)
