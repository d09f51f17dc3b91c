"""PyTorch values through the public checks: nested lists and tuples of tensors,
bfloat16 leaves, complex tensors and costs that do not return one differentiable number.

Derivatives are of x^2 and x^3 (common practice); the tests read messages and notes.
"""
import numpy as np
import pytest

import gradcheck_kit as gk

torch = pytest.importorskip("torch")


def _f64(values):
    return torch.tensor(values, dtype=torch.float64)


def nested_cost(p):
    return (p[0] ** 2).sum() + p[1][0] ** 3


def test_a_list_and_tuple_nest_of_tensors_is_checked_and_rebuilt():
    params = [_f64([0.5, -1.0]), (_f64(2.0),)]
    report = gk.compare_gradient(nested_cost, params)
    assert report.passed and len(report.rows) == 3
    g = gk.numeric_gradient(nested_cost, params)
    assert isinstance(g, list) and isinstance(g[1], tuple)
    assert torch.is_tensor(g[0]) and g[0].dtype == torch.float64
    np.testing.assert_allclose(g[0].numpy(), [1.0, -2.0], rtol=1e-8)
    assert float(g[1][0]) == pytest.approx(12.0, rel=1e-8)
    wrong = gk.compare_gradient(nested_cost, params, lambda p: [2 * p[0], (2 * p[1][0] ** 2,)])
    assert not wrong.passed and [r.name for r in wrong.mismatches] == ["1.0"]


def test_bfloat16_leaves_are_checked_on_float64_copies_with_a_note():
    x = torch.tensor([0.5, 1.5], dtype=torch.bfloat16)
    report = gk.compare_gradient(lambda t: (t ** 2).sum(), x)
    assert report.passed
    assert any("torch values in lower precision (x) were checked on float64 copies" in n
               for n in report.notes)
    assert x.dtype == torch.bfloat16 and x.tolist() == [0.5, 1.5]    # unchanged


def test_a_complex_tensor_is_refused_with_a_way_out():
    with pytest.raises(gk.CheckInputError, match="params leaf 'x' is a complex tensor "
                                                 r"\(torch.complex64\).*split real and imaginary"):
        gk.compare_gradient(lambda t: (t.abs() ** 2).sum(), torch.tensor([0.5 + 1j]))


@pytest.mark.parametrize("cost, message", [
    (lambda t: t ** 2, "cost: returned a torch value with 2 elements"),
    (lambda t: (t ** 2).sum().item(), "the cost returned a float, not a tensor"),
    (lambda t: (t ** 2).sum().detach(), "does not depend on params through torch operations"),
])
def test_costs_torch_autograd_cannot_use_are_named(cost, message):
    with pytest.raises(gk.CheckInputError, match=message):
        gk.compare_gradient(cost, _f64([0.5, 1.0]))
