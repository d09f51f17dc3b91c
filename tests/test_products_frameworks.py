"""compare_jvp / compare_vjp / compare_hvp on PyTorch and JAX values: the framework's own
products by default (through custom backward rules, so a wrong one is caught), user
products that get v (or u) as framework values, modules as params, and the caller's
tensors and module state left as they were.

Sources: the derivatives of tanh, x^3 and sin^2 are textbook calculus; a Hessian-vector
product of a quadratic 0.5 x^T Q x is Q v (common practice).  Invented, seeded data.
"""
import copy

import numpy as np
import pytest

import gradcheck_kit as gk

torch = pytest.importorskip("torch")

A_NP = np.array([[1.0, 2.0, -0.5], [0.5, -1.0, 0.3], [3.0, 0.2, 1.0], [0.1, 0.4, -2.0]])
A = torch.tensor(A_NP)
X0 = torch.tensor([0.4, 0.3, -0.2], dtype=torch.float64)


class CubeWithBug(torch.autograd.Function):
    """z^3, whose backward is 10% off where z > 0.5 (a planted bug)."""

    @staticmethod
    def forward(ctx, z):
        ctx.save_for_backward(z)
        return z ** 3

    @staticmethod
    def backward(ctx, grad):
        (z,) = ctx.saved_tensors
        return grad * 3 * z ** 2 * torch.where(z > 0.5, 1.1, 1.0)


class Cube(CubeWithBug):
    @staticmethod
    def backward(ctx, grad):
        (z,) = ctx.saved_tensors
        return grad * 3 * z ** 2


def test_a_wrong_custom_backward_is_caught_by_compare_vjp_and_the_right_one_passes():
    x = X0.clone()
    assert float((A @ x).max()) > 0.5          # the planted bug's region is in play
    wrong = gk.compare_vjp(lambda x: CubeWithBug.apply(A @ x), x, seed=0)
    assert not wrong.passed
    assert wrong.counts.get("disagree", 0) == 3
    assert any("torch.autograd" in n for n in wrong.notes)
    right = gk.compare_vjp(lambda x: Cube.apply(A @ x), x, seed=0)
    assert right.passed
    torch.testing.assert_close(x, X0, rtol=0, atol=0)   # the caller's tensor is untouched


def test_user_products_get_framework_values_for_v_and_u():
    seen = []

    def jvp(x, v):
        seen.append((type(x), type(v), v.dtype))
        return (1 - torch.tanh(A @ x) ** 2) * (A @ v)

    def vjp(x, u):
        seen.append((type(x), type(u), u.dtype))
        return ((1 - torch.tanh(A @ x) ** 2) * u) @ A

    assert gk.compare_jvp(lambda x: torch.tanh(A @ x), X0, jvp, seed=1).passed
    assert gk.compare_vjp(lambda x: torch.tanh(A @ x), X0, vjp, seed=1).passed
    assert set(seen) == {(torch.Tensor, torch.Tensor, torch.float64)}
    # a jvp that drops a factor is found
    bad = gk.compare_jvp(lambda x: torch.tanh(A @ x), X0, lambda x, v: A @ v, seed=1)
    assert not bad.passed


def test_hessian_vector_products_of_a_quadratic_and_a_gauss_newton_stand_in():
    Q = A.T @ A + torch.eye(3, dtype=torch.float64)

    def quadratic(x):
        return 0.5 * x @ Q @ x

    assert gk.compare_hvp(quadratic, X0, lambda x, v: Q @ v, seed=2).passed
    assert gk.compare_hvp(quadratic, X0, seed=2).passed        # torch's double backward

    def loss(x):
        return 0.5 * torch.sum(torch.sin(A @ x) ** 2)

    def gauss_newton(x, v):        # J^T J v with J = cos(Ax) A: drops the curvature term
        J = torch.cos(A @ x)[:, None] * A
        return J.T @ (J @ v)

    assert gk.compare_hvp(loss, X0 + 1.0, seed=2).passed
    assert not gk.compare_hvp(loss, X0 + 1.0, gauss_newton, seed=2).passed


def test_a_module_as_params_is_left_as_it_was():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(3, 5), torch.nn.Tanh(),
                                torch.nn.Linear(5, 2)).double()
    X = torch.randn(7, 3, dtype=torch.float64)
    model(X).sum().backward()                    # the caller's .grad, to be kept
    state = copy.deepcopy(model.state_dict())
    grads = [p.grad.clone() for p in model.parameters()]

    def hvp(m, v):                               # v: a dict by parameter name
        assert set(v) == {name for name, _ in m.named_parameters()}
        return {name: 2 * t for name, t in v.items()}   # wrong on purpose

    assert gk.compare_jvp(lambda m: m(X), model, seed=3).passed
    assert gk.compare_vjp(lambda m: m(X), model, seed=3).passed
    assert gk.compare_hvp(lambda m: (m(X) ** 2).sum(), model, seed=3).passed
    assert not gk.compare_hvp(lambda m: (m(X) ** 2).sum(), model, hvp, seed=3).passed
    for key, value in model.state_dict().items():
        assert torch.equal(value, state[key]), key
    assert all(torch.equal(g, p.grad) for g, p in zip(grads, model.parameters()))


def test_a_float32_module_with_float32_data_is_checked_in_its_own_precision():
    torch.manual_seed(1)
    model = torch.nn.Linear(3, 2)                # float32, and so is X: float64 copies fail
    X = torch.randn(4, 3)
    report = gk.compare_jvp(lambda m: torch.tanh(m(X)), model, seed=0)
    assert report.passed
    assert any("own precision" in n for n in report.notes)


def test_bad_framework_input_gets_a_message():
    with pytest.raises(gk.CheckInputError, match="jvp: expected a function jvp"):
        gk.compare_jvp(lambda x: A @ x, X0, jvp=3)
    with pytest.raises(gk.CheckInputError, match="fun: expected a callable"):
        gk.compare_vjp("not a function", X0)
    with pytest.raises(gk.CheckInputError, match="shape"):
        gk.compare_jvp(lambda x: A @ x, X0, lambda x, v: v, seed=0)


def test_jax_products():
    jax = pytest.importorskip("jax")
    jnp = jax.numpy
    Aj = jnp.asarray(A_NP)

    @jax.custom_vjp
    def cube(z):
        return z ** 3

    def cube_forward(z):
        return z ** 3, z

    def cube_backward(z, g):       # 10% off where z > 0.5, as above
        return (g * 3 * z ** 2 * jnp.where(z > 0.5, 1.1, 1.0),)

    cube.defvjp(cube_forward, cube_backward)
    x = jnp.asarray(X0.numpy())
    assert not gk.compare_vjp(lambda x: cube(Aj @ x), x, seed=0).passed
    assert gk.compare_vjp(lambda x: (Aj @ x) ** 3, x, seed=0).passed
    assert gk.compare_jvp(lambda x: jnp.tanh(Aj @ x), x, seed=0).passed
    assert gk.compare_hvp(lambda x: jnp.sum(jnp.sin(Aj @ x) ** 2), x, seed=0).passed
    assert not gk.compare_hvp(lambda x: jnp.sum(jnp.sin(Aj @ x) ** 2), x,
                              lambda x, v: v, seed=0).passed
