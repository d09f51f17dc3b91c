"""The gradient monitor on PyTorch and JAX values: a planted region-dependent bug in a custom
backward rule caught at the first checked step past the switch, torch.autograd / jax.grad
as the gradient, modules as params and g, and a training loop whose tensors, module state,
.grad and random streams the monitor never touches.

Sources: the safe-log continuation (log continued below a floor by its tangent) and the
squared-error losses are common practice; the data are invented and seeded, so nothing
here can flake.
"""
import copy
import random

import numpy as np
import pytest

import gradcheck_kit as gk

torch = pytest.importorskip("torch")

FLOOR = 1e-3
PULL = 1e-3
_rng = np.random.default_rng(7)
A_NP = _rng.normal(size=(40, 6))
_target = np.abs(_rng.normal(size=6)) + 0.2
_target[0] = -0.3            # the fit pulls x[0] through FLOOR
B_NP = A_NP @ _target


class SafeLogWithBug(torch.autograd.Function):
    """log(x) continued below FLOOR by its tangent; the backward forgets the branch and
    uses 1/x everywhere: wrong only once an entry is below FLOOR."""

    @staticmethod
    def forward(ctx, x):
        ctx.save_for_backward(x)
        return torch.where(x >= FLOOR, torch.log(torch.clamp(x, min=FLOOR)),
                           np.log(FLOOR) + (x - FLOOR) / FLOOR)

    @staticmethod
    def backward(ctx, grad):
        (x,) = ctx.saved_tensors
        return grad / x


class SafeLog(SafeLogWithBug):
    @staticmethod
    def backward(ctx, grad):
        (x,) = ctx.saved_tensors
        return grad * torch.where(x >= FLOOR, 1 / torch.clamp(x, min=FLOOR),
                                  torch.full_like(x, 1 / FLOOR))


def fit_cost(rule):
    A, B = torch.tensor(A_NP), torch.tensor(B_NP)

    def cost(x):
        r = A @ x - B
        return 0.5 * r @ r / len(B) - PULL * torch.sum(rule.apply(x))
    return cost


def descend_torch(cost, steps, monitor=None, rate=0.05):
    """Plain gradient descent with loss.backward(): the optimizer's g is x.grad."""
    x = torch.full((6,), 0.5, dtype=torch.float64, requires_grad=True)
    path = []
    for step in range(steps):
        x.grad = None
        cost(x).backward()
        path.append(x.detach().clone())
        if monitor is not None:
            monitor.observe(x, x.grad, step=step)
        with torch.no_grad():
            x -= rate * x.grad
    return path


def test_a_wrong_custom_backward_is_caught_at_the_first_checked_step_past_the_switch():
    cost = fit_cost(SafeLogWithBug)
    path = descend_torch(cost, 300)
    switch = next(k for k, x in enumerate(path) if float(x.min()) < FLOOR)
    assert 10 < switch < 280        # the bug's region is reached after some steps
    monitor = gk.GradientMonitor(cost, every=7, seed=3)
    descend_torch(cost, 300, monitor)
    report = monitor.report()
    first_checked_after = min(s for s in report.checked_steps if s >= switch)
    assert report.first_wrong_step == first_checked_after
    assert report.last_right_step == max(s for s in report.checked_steps if s < switch)
    assert all(not r.failing for r in report.rows if r.step < switch)
    # the saved point is a float64 numpy copy of the tensor at that step
    assert report.saved.framework == "torch"
    np.testing.assert_array_equal(report.saved.params, path[report.first_wrong_step].numpy())
    assert [r.name for r in report.coordinate_report.mismatches] == ["x[0]"]
    assert report.saved.recheck().verdict == "disagree"
    with pytest.raises(gk.CheckInputError, match="write_npz"):
        report.saved.write_case("unused.py")


def test_gradient_none_takes_torch_autograd_through_the_custom_backward():
    # observe() without g: the monitor differentiates the cost itself, through the same
    # wrong backward; with the right backward nothing fails along the same run
    wrong = gk.GradientMonitor(fit_cost(SafeLogWithBug), every=7, seed=3)
    right = gk.GradientMonitor(fit_cost(SafeLog), every=7, seed=3)
    x = torch.full((6,), 0.5, dtype=torch.float64)
    A, B = torch.tensor(A_NP), torch.tensor(B_NP)
    for step in range(300):
        wrong.observe(x, step=step)
        right.observe(x, step=step)
        g = A.T @ (A @ x - B) / len(B) - PULL * torch.where(
            x >= FLOOR, 1 / torch.clamp(x, min=FLOOR), torch.full_like(x, 1 / FLOOR))
        x = x - 0.05 * g
    assert not wrong.report().passed
    assert right.report().passed and len(right.report().rows) == 43
    assert any("torch.autograd" in n for n in right.report().notes)
    assert right.report().gradient_calls == 43


class Regressor(torch.nn.Module):
    def __init__(self):
        super().__init__()
        self.hidden = torch.nn.Linear(4, 8)
        self.out = torch.nn.Linear(8, 1)
        self.register_buffer("scale", torch.tensor(0.5))

    def forward(self, X):
        return self.out(torch.tanh(self.hidden(X))).squeeze(-1) * self.scale


def test_a_module_and_its_grad_are_params_and_g_and_the_loop_is_left_alone():
    torch.manual_seed(0)
    X, y = torch.randn(64, 4, dtype=torch.float64), torch.randn(64, dtype=torch.float64)
    model = Regressor().double()

    def cost(m):
        return torch.mean((m(X) - y) ** 2)

    twin = copy.deepcopy(model)                 # the same run, unmonitored
    monitor = gk.GradientMonitor(cost, every=5, seed=1)
    for step in range(30):
        for m in (model, twin):
            m.zero_grad()
            cost(m).backward()
        np.random.seed(step)
        random.seed(step)
        torch_state = torch.random.get_rng_state()
        before = {k: v.clone() for k, v in model.state_dict().items()}
        grads = [p.grad.clone() for p in model.parameters()]
        row = monitor.observe(model, model, step=step)
        assert (row is not None) == (step % 5 == 0)
        # nothing the loop holds moved: values, buffers, .grad, modes, random streams
        assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())
        assert all(torch.equal(g, p.grad) for g, p in zip(grads, model.parameters()))
        assert model.training
        assert torch.equal(torch.random.get_rng_state(), torch_state)
        assert np.random.get_state()[1][0] == np.random.RandomState(step).get_state()[1][0]
        assert random.getstate() == random.Random(step).getstate()
        with torch.no_grad():
            for m in (model, twin):
                for p in m.parameters():
                    p -= 0.1 * p.grad
    report = monitor.report()
    assert report.passed and report.checked_steps == [0, 5, 10, 15, 20, 25]
    for (k, a), b in zip(model.state_dict().items(), twin.state_dict().values()):
        assert torch.equal(a, b), k


def test_a_module_without_grad_is_refused_with_a_message():
    model = Regressor().double()
    monitor = gk.GradientMonitor(lambda m: m(torch.ones(2, 4, dtype=torch.float64)).sum())
    with pytest.raises(gk.CheckInputError, match=r"g: the module's parameter 'hidden.weight' "
                                                 r"has no \.grad"):
        monitor.observe(model, model, step=0)


def test_jax_arrays_with_a_wrong_custom_derivative_rule():
    jax = pytest.importorskip("jax")
    jnp = jax.numpy

    @jax.custom_jvp
    def safe_log(x):
        return jnp.where(x >= FLOOR, jnp.log(jnp.maximum(x, FLOOR)),
                         np.log(FLOOR) + (x - FLOOR) / FLOOR)

    @safe_log.defjvp
    def _forgets_the_branch(primals, tangents):
        (x,), (t,) = primals, tangents
        return safe_log(x), t / x

    A, B = jnp.asarray(A_NP), jnp.asarray(B_NP)

    def cost(x):
        r = A @ x - B
        return 0.5 * r @ r / len(B) - PULL * jnp.sum(safe_log(x))

    monitor = gk.GradientMonitor(cost, every=10, seed=2)
    x = np.full(6, 0.5)
    switch = None
    for step in range(200):
        if switch is None and x.min() < FLOOR:
            switch = step
        monitor.observe(jnp.asarray(x), step=step)      # gradient=None: jax.grad's
        x = x - 0.05 * (A_NP.T @ (A_NP @ x - B_NP) / len(B_NP) - PULL * np.where(
            x >= FLOOR, 1 / np.maximum(x, FLOOR), 1 / FLOOR))
    report = monitor.report()
    assert switch is not None
    assert report.first_wrong_step == min(s for s in report.checked_steps if s >= switch)
    assert any("jax.grad" in n for n in report.notes)
