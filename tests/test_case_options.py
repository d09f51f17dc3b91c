"""@gk.case checks its options when it is applied.

A misspelt option, an ill-typed flag or a bare decorator must fail at once with
one line naming the option, what was expected and what was got, not turn into
a check that quietly means something else.  The costs here are invented.
"""
import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.cases import CASE_ATTRIBUTE, check_case

X0 = np.array([0.5, -1.5, 2.0])


def fresh_cost():
    """A new cost for each declaration, so no declaration sticks to a module-level object
    (which the plugin would collect as a case)."""
    def cost(x):
        return np.sum(x ** 3)
    return cost


def gradient(x):
    return 3 * x ** 2


def refused(**declaration):
    with pytest.raises(gk.CheckInputError) as info:
        gk.case(**declaration)(fresh_cost())
    message = str(info.value)
    assert "\n" not in message and message.startswith("case: ")
    return message


@pytest.mark.parametrize("value", ["yes", "no", 1, 0, None, [True]])
def test_expect_mismatch_must_be_a_bool(value):
    message = refused(gradient=gradient, params=X0, expect_mismatch=value)
    assert f"expect_mismatch: expected True or False, got {value!r}" in message


def test_a_string_expect_mismatch_can_no_longer_turn_a_right_gradient_into_a_pass():
    """'yes' was taken as truthy for the report and a correct gradient then passed."""
    with pytest.raises(gk.CheckInputError, match="expect_mismatch"):
        @gk.case(gradient=gradient, params=X0, expect_mismatch="yes")
        def declared(x):
            return np.sum(x ** 3)


@pytest.mark.parametrize("flag", [True, False, np.bool_(True)])
def test_bool_expect_mismatch_is_accepted(flag):
    declared = gk.case(gradient=gradient, params=X0, expect_mismatch=flag)(fresh_cost())
    assert getattr(declared, CASE_ATTRIBUTE).expect_mismatch is bool(flag)


@pytest.mark.parametrize("value", [-1, 0, 2.5, "25", True, None])
def test_examples_must_be_a_positive_int(value):
    message = refused(gradient=gradient, params=X0, examples=value)
    assert "examples: expected a positive int" in message and f"got {value!r}" in message


def test_numpy_int_examples_are_accepted():
    declared = gk.case(gradient=gradient, params=X0, examples=np.int64(7))(fresh_cost())
    assert getattr(declared, CASE_ATTRIBUTE).examples == 7


def test_unknown_option_names_are_refused_with_the_known_ones():
    message = refused(gradient=gradient, params=X0, methd="central")
    assert "unknown option 'methd'" in message and "method" in message


def test_unknown_method_is_refused():
    message = refused(gradient=gradient, params=X0, method="centered")
    assert "method: expected one of" in message and "'centered'" in message


@pytest.mark.parametrize("declaration, named", [
    ({"rtol": -1.0}, "rtol: expected a finite number >= 0"),
    ({"atol": "small"}, "atol: expected a finite number >= 0"),
    ({"seed": 1.5}, "seed: expected an int"),
    ({"vectorized": "no"}, "vectorized: expected True or False"),
    ({"name": 7}, "name: expected a non-empty str"),
])
def test_ill_typed_options_are_refused(declaration, named):
    assert named in refused(gradient=gradient, params=X0, **declaration)


def test_bare_decorator_says_to_write_it_with_parentheses():
    with pytest.raises(gk.CheckInputError) as info:
        @gk.case
        def loss(x):
            return np.sum(x ** 2)
    message = str(info.value)
    assert "\n" not in message
    assert "@gk.case(params=...)" in message and "parentheses" in message and "'loss'" in message


def test_empty_parentheses_still_ask_for_params():
    with pytest.raises(gk.CheckInputError, match="params= is required"):
        gk.case()(fresh_cost())


def test_a_well_formed_declaration_returns_the_cost_and_checks_it():
    cost = fresh_cost()
    declared = gk.case(gradient=gradient, params=X0, method="central", seed=3, rtol=1e-6,
                       name="cubic")(cost)
    assert declared is cost and declared(X0) == np.sum(X0 ** 3)
    declaration = getattr(declared, CASE_ATTRIBUTE)
    assert declaration.name == "cubic" and declaration.options == {
        "method": "central", "seed": 3, "rtol": 1e-6}
    assert check_case(declaration).passed


def test_swapped_positional_arguments_are_refused():
    """gk.case(params, gradient): the gradient slot holds the point, params a function."""
    message = refused(gradient=X0, params=gradient)
    assert "look swapped" in message and "gk.case(gradient=..., params=...)" in message
    assert "a ndarray" in message and "a function (gradient)" in message


def test_a_strategy_in_the_gradient_slot_is_refused_as_swapped():
    from gradcheck_kit import strategies as gst
    message = refused(gradient=gst.points((3,)), params=X0)
    assert "gradient= got a hypothesis strategy" in message and "look swapped" in message


def test_params_alone_in_the_first_slot_is_named():
    with pytest.raises(gk.CheckInputError) as info:
        gk.case(X0)(fresh_cost())
    message = str(info.value)
    assert "\n" not in message and "params= is required" in message
    assert "the first positional argument is the gradient (got a ndarray)" in message


@pytest.mark.parametrize("declaration, named", [
    ({"gradient": gradient, "params": "abc"}, "params: expected a structure"),
    ({"gradient": "grad", "params": X0}, "gradient: expected a function, values like params"),
])
def test_string_params_or_gradient_are_refused(declaration, named):
    message = refused(**declaration)
    assert named in message and "got a str" in message


def test_a_params_function_that_raises_is_named_in_one_message():
    def load_point(rng):
        raise KeyError("pressure")
    c = getattr(gk.case(gradient=gradient, params=load_point)(fresh_cost()), CASE_ATTRIBUTE)
    with pytest.raises(gk.CheckInputError) as info:
        check_case(c)
    assert str(info.value) == ("params: the params function 'load_point' (called with a numpy "
                               "Generator) raised KeyError: 'pressure'")
    assert isinstance(info.value.__cause__, KeyError)


def test_a_torch_module_as_params_is_a_structure_not_a_params_function():
    """A torch module is callable, but it is the parameters: it must not be called with a
    Generator, nor be taken for swapped arguments."""
    torch = pytest.importorskip("torch")
    torch.manual_seed(0)
    layer = torch.nn.Linear(2, 1).double()
    x = torch.tensor([[0.5, -1.0]], dtype=torch.float64)

    def cost(module):
        return (module(x) ** 2).sum()
    declared = getattr(gk.case(params=layer)(cost), CASE_ATTRIBUTE)   # autograd of torch
    result = check_case(declared)
    assert result.passed and len(result.report.rows) == 3       # 2 weights and a bias
