"""PyTorch code as input of the checks: tensors, modules, torch.autograd as the analytic side.

Closed forms used as references (sources beside each test):
- softmax cross-entropy: d/dz of -log softmax(z)_y is softmax(z) - e_y, a standard result
  (common practice; e.g. Bishop, Pattern Recognition and Machine Learning, eq. 4.109);
- layer normalisation without affine terms: dL/dx = (g - mean(g) - y mean(g y)) / sigma,
  with y = (x - mu) / sigma, sigma = sqrt(var + eps), derived by hand from the definition
  (Ba, Kiros & Hinton, "Layer Normalization", 2016) and checked here with mpmath.diff;
- convolution: torch's conv2d is a cross-correlation (its documentation), so the gradient
  of sum(g * conv2d(x, w)) in w[a, b] is sum_ij g[i, j] x[i + a, j + b] (from the definition).
"""
import copy

import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="PyTorch is not installed (pip install torch)")

import gradcheck_kit as gk  # noqa: E402
from gradcheck_kit.frameworks import load_torch_params  # noqa: E402

F = torch.nn.functional


def names_of(rows):
    return {r.name for r in rows}


# --- a custom autograd rule: a softplus with a learnable sharpness -----------------------------

class SharpSoftplus(torch.autograd.Function):
    """y = log(1 + exp(beta x)) / beta, with a hand-written backward (optionally buggy)."""

    @staticmethod
    def forward(ctx, x, beta, bug):
        ctx.save_for_backward(x, beta)
        ctx.bug = bug
        return F.softplus(beta * x) / beta

    @staticmethod
    def backward(ctx, g):
        x, beta = ctx.saved_tensors
        s = torch.sigmoid(beta * x)
        dx = g * s
        # d/dbeta [softplus(beta x) / beta] = x s / beta - softplus(beta x) / beta^2
        dbeta = (g * (x * s / beta - F.softplus(beta * x) / beta ** 2)).sum()
        if ctx.bug == "sign":
            dx = -dx
        if ctx.bug == "missing term":
            dbeta = (g * x * s / beta).sum()
        return dx, dbeta.reshape(beta.shape), None


def sharp_cost(bug=None):
    target = torch.linspace(0.2, 1.4, 5, dtype=torch.float64)

    def cost(p):
        y = SharpSoftplus.apply(p["x"], p["beta"], bug)
        return ((y - target) ** 2).sum()
    return cost


def sharp_params():
    return {"x": torch.tensor([-1.2, -0.3, 0.4, 0.9, 1.7], dtype=torch.float64),
            "beta": torch.tensor(1.6, dtype=torch.float64)}


def test_a_correct_custom_backward_passes():
    report = gk.compare_gradient(sharp_cost(), sharp_params())
    assert report.passed, report.to_text()
    assert len(report.rows) == 6
    assert any("torch.autograd" in n for n in report.notes)


def test_a_wrong_sign_fails_at_the_coordinates_it_touches():
    report = gk.compare_gradient(sharp_cost("sign"), sharp_params())
    assert not report.passed
    assert names_of(report.mismatches) == {f"x[{i}]" for i in range(5)}
    assert next(r for r in report.rows if r.name == "beta").verdict == "agree"


def test_a_missing_term_fails_at_its_parameter_only():
    report = gk.compare_gradient(sharp_cost("missing term"), sharp_params())
    assert names_of(report.mismatches) == {"beta"}


class SquareLinear(torch.autograd.Function):
    """y = W x + b with a hand-written backward; bug='transposed' returns dW transposed."""

    @staticmethod
    def forward(ctx, x, W, b, bug):
        ctx.save_for_backward(x, W)
        ctx.bug = bug
        return W @ x + b

    @staticmethod
    def backward(ctx, g):
        x, W = ctx.saved_tensors
        dW = torch.outer(g, x)
        if ctx.bug == "transposed":
            dW = dW.T
        return W.T @ g, dW, g, None


def linear_cost(bug=None):
    target = torch.tensor([0.5, -1.0, 2.0], dtype=torch.float64)

    def cost(p):
        return (torch.tanh(SquareLinear.apply(p["x"], p["W"], p["b"], bug)) - target).pow(2).sum()
    return cost


def linear_params():
    g = torch.Generator().manual_seed(3)
    return {"x": torch.randn(3, generator=g, dtype=torch.float64),
            "W": torch.randn(3, 3, generator=g, dtype=torch.float64),
            "b": torch.randn(3, generator=g, dtype=torch.float64)}


def test_a_transposed_weight_gradient_fails_off_the_diagonal():
    assert gk.compare_gradient(linear_cost(), linear_params()).passed
    report = gk.compare_gradient(linear_cost("transposed"), linear_params())
    # W's diagonal equals its transpose's: only the off-diagonal entries are wrong
    assert names_of(report.mismatches) == {f"W[{i}, {j}]" for i in range(3) for j in range(3)
                                           if i != j}


# --- torch's own derivatives of standard operations, against closed forms ----------------------

def within_promise(report, exact: dict):
    """Every numeric value within its error estimate of the exact derivative."""
    for r in report.rows:
        assert abs(r.numeric - exact[r.name]) <= r.error_estimate, (r.name, r.numeric,
                                                                   exact[r.name])


def entry_names(name, shape):
    return [f"{name}[{', '.join(map(str, i))}]" for i in np.ndindex(*shape)]


def test_softmax_cross_entropy_matches_p_minus_y():
    z = torch.tensor([[1.5, -0.3, 0.2, 0.9], [-1.1, 0.4, 2.2, 0.0]], dtype=torch.float64)
    labels = torch.tensor([3, 1])
    report = gk.compare_gradient(lambda z: F.cross_entropy(z, labels), z)
    assert report.passed, report.to_text()
    # standard result: (softmax(z) - onehot(y)) / N for the mean over N rows
    p = torch.softmax(z, dim=1).numpy()
    exact = (p - np.eye(4)[labels.numpy()]) / 2
    within_promise(report, dict(zip(entry_names("x", z.shape), exact.ravel())))
    for r in report.rows:
        assert r.analytic == pytest.approx(dict(zip(entry_names("x", z.shape),
                                                    exact.ravel()))[r.name], rel=1e-12, abs=1e-15)


def layer_norm_gradient(x, g, eps):
    """The hand-derived closed form of d sum(g * LN(x)) / dx (see the module docstring)."""
    mu, var = x.mean(), x.var()
    sigma = np.sqrt(var + eps)
    y = (x - mu) / sigma
    return (g - g.mean() - y * np.mean(g * y)) / sigma


def test_layer_norm_matches_its_closed_form_and_mpmath():
    import mpmath

    x = np.array([0.3, -1.2, 2.5, 0.8, -0.4])
    g = np.array([1.0, -0.5, 0.25, 2.0, -1.5])
    eps = 1e-5
    cost = lambda t: (torch.tensor(g) * F.layer_norm(t, (5,), eps=eps)).sum()
    report = gk.compare_gradient(cost, torch.tensor(x))
    assert report.passed, report.to_text()
    exact = layer_norm_gradient(x, g, eps)
    within_promise(report, dict(zip(entry_names("x", (5,)), exact)))

    # the closed form itself, against mpmath at 30 digits (two coordinates)
    mpmath.mp.dps = 30

    def ln_cost(*v):
        mu = sum(v) / 5
        var = sum((vi - mu) ** 2 for vi in v) / 5
        return sum(gi * (vi - mu) / mpmath.sqrt(var + mpmath.mpf(eps)) for gi, vi in zip(g, v))
    for i in (0, 3):
        order = tuple(1 if k == i else 0 for k in range(5))
        assert float(mpmath.diff(ln_cost, tuple(map(mpmath.mpf, x)), order)) == \
            pytest.approx(exact[i], rel=1e-12)


def test_a_small_convolution_matches_the_cross_correlation():
    rng = np.random.default_rng(7)
    x = rng.normal(size=(4, 4))
    g = rng.normal(size=(3, 3))
    w = torch.tensor(rng.normal(size=(2, 2)))
    xt, gt = torch.tensor(x)[None, None], torch.tensor(g)[None, None]
    report = gk.compare_gradient(lambda w: (gt * F.conv2d(xt, w[None, None])).sum(), w)
    assert report.passed, report.to_text()
    exact = {f"x[{a}, {b}]": sum(g[i, j] * x[i + a, j + b] for i in range(3) for j in range(3))
             for a in range(2) for b in range(2)}
    within_promise(report, exact)


# --- modules ---------------------------------------------------------------------------------

class Scorer(torch.nn.Module):
    """An invented two-layer scorer: encoder (Linear, Tanh), batch norm, head."""

    def __init__(self):
        super().__init__()
        self.encoder = torch.nn.Sequential(torch.nn.Linear(3, 4), torch.nn.Tanh())
        self.norm = torch.nn.BatchNorm1d(4)
        self.head = torch.nn.Linear(4, 1)

    def forward(self, x):
        return self.head(self.norm(self.encoder(x)))


def scorer_data():
    g = torch.Generator().manual_seed(11)
    return torch.randn(6, 3, generator=g, dtype=torch.float64), \
        torch.randn(6, 1, generator=g, dtype=torch.float64)


def test_a_module_is_checked_by_its_parameter_names():
    torch.manual_seed(0)
    model = Scorer().double().eval()
    x, y = scorer_data()
    report = gk.compare_gradient(lambda m: F.mse_loss(m(x), y), model)
    assert report.passed, report.to_text()
    names = names_of(report.rows)
    assert {r.parameter for r in report.rows} == {"encoder.0.weight", "encoder.0.bias",
                                                  "norm.weight", "norm.bias", "head.weight",
                                                  "head.bias"}
    assert "encoder.0.weight[2, 1]" in names


def test_the_module_and_its_state_are_left_as_they_were():
    torch.manual_seed(1)
    model = Scorer()   # float32, training mode (batch norm: batch statistics), no dropout
    model.head.bias.requires_grad_(False)
    x, y = (t.float() for t in scorer_data())
    F.mse_loss(model(x), y).backward()          # .grad holds something to keep
    state = copy.deepcopy(model.state_dict())
    grads = {n: None if p.grad is None else p.grad.clone() for n, p in model.named_parameters()}
    flags = {n: p.requires_grad for n, p in model.named_parameters()}

    def cost(m):
        m.eval()                                  # a cost that flips the mode
        return F.mse_loss(m(x), y)
    report = gk.compare_gradient(cost, model)
    assert report.passed, report.to_text()
    assert model.training and model.norm.training
    for k, v in model.state_dict().items():
        assert torch.equal(v, state[k]), k
    for n, p in model.named_parameters():
        assert p.requires_grad == flags[n]
        assert (p.grad is None) == (grads[n] is None) and \
            (p.grad is None or torch.equal(p.grad, grads[n])), n
    assert any("held fixed" in note and "head.bias" in note for note in report.notes)
    assert "head.bias" not in {r.parameter for r in report.rows}


def test_dropout_in_training_mode_is_refused_with_the_way_out():
    model = torch.nn.Sequential(torch.nn.Linear(2, 3), torch.nn.Dropout(0.2),
                                torch.nn.Linear(3, 1))
    with pytest.raises(gk.CheckInputError, match=r"training mode.*dropout.*\.eval\(\)") as info:
        gk.compare_gradient(lambda m: m(torch.ones(1, 2)).sum(), model)
    assert "1: Dropout with p=0.2" in str(info.value) and "with_rng=True" in str(info.value)
    assert gk.compare_gradient(lambda m: m(torch.ones(1, 2)).sum(), model.eval()).passed


def test_dropout_with_with_rng_checks_one_draw_on_both_sides():
    torch.manual_seed(4)
    model = torch.nn.Sequential(torch.nn.Linear(3, 5), torch.nn.Dropout(0.4),
                                torch.nn.Linear(5, 1)).double()      # training mode
    x = torch.linspace(-1.0, 1.0, 6, dtype=torch.float64).reshape(2, 3)

    def cost(m, rng):
        with torch.random.fork_rng():          # the mask drawn from the generator given
            torch.manual_seed(int(rng.integers(2 ** 31)))
            return m(x).pow(2).sum()
    report = gk.compare_gradient(cost, model, with_rng=True, seed=5)
    # the analytic side (torch.autograd) saw the draw the numeric side saw, else the
    # dropped units would disagree
    assert report.passed, report.to_text()
    assert model.training


def test_float32_values_are_widened_with_a_note_and_kept_on_request():
    w = torch.tensor([0.3, -0.7, 1.1])                   # float32
    cost = lambda w: (torch.exp(w) * w).sum()
    wide = gk.compare_gradient(cost, w)
    assert wide.passed and any("float64 copies" in n for n in wide.notes)
    kept = gk.compare_gradient(cost, w, keep_precision=True)
    assert kept.passed
    assert not any("float64 copies" in n for n in kept.notes)
    assert any("float32" in n for n in kept.notes)       # the engine's lower-precision rules
    assert w.dtype == torch.float32 and torch.equal(w, torch.tensor([0.3, -0.7, 1.1]))


def test_float32_data_inside_the_cost_falls_back_to_float32_with_a_note():
    model = torch.nn.Linear(3, 1)
    x = torch.ones(2, 3)                                  # float32 data: no float64 matmul
    report = gk.compare_gradient(lambda m: m(x).pow(2).sum(), model)
    assert report.passed, report.to_text()
    assert any("fails on float64 copies" in n for n in report.notes)


def test_the_complex_step_is_used_where_the_torch_cost_is_complex_safe():
    w = torch.tensor([0.4, 1.3, -0.8], dtype=torch.float64)
    safe = gk.compare_gradient(lambda w: (torch.sin(w) * w ** 3).sum(), w)
    assert safe.passed and safe.method == "complex-step"
    unsafe = gk.compare_gradient(lambda w: (torch.abs(w) * w).sum(), w)
    assert unsafe.passed and unsafe.method == "richardson"


def test_vectorized_runs_through_vmap_and_falls_back_with_a_note():
    calls = {"n": 0}
    A = torch.linspace(-1.0, 2.0, 18, dtype=torch.float64).reshape(3, 6)

    def cost(w):
        calls["n"] += 1
        return torch.log1p((A @ w) ** 2).sum()
    w = torch.linspace(-0.6, 0.4, 6, dtype=torch.float64)
    plain = gk.compare_gradient(cost, w)
    plain_calls, calls["n"] = calls["n"], 0
    report = gk.compare_gradient(cost, w, vectorized=True)
    assert plain.passed and report.passed
    assert not any("could not batch" in n for n in report.notes)
    assert plain_calls >= plain.evaluations
    assert calls["n"] < plain_calls / 3               # batches, not one call per point

    def concrete(w):
        return torch.tensor(float(w.sum()) ** 2, dtype=w.dtype) + (w ** 2).sum()  # not vmappable
    fallback = gk.compare_gradient(concrete, w, vectorized=True,
                                   gradient=lambda w: 2 * w.sum() + 2 * w)
    assert fallback.passed
    assert any("torch.func.vmap could not batch the cost" in n for n in fallback.notes)


def test_a_gradient_function_and_a_gradient_value_in_torch_types():
    w = torch.tensor([0.5, -1.5], dtype=torch.float64)
    cost = lambda w: (w ** 4).sum()
    assert gk.compare_gradient(cost, w, lambda w: 4 * w ** 3).passed
    assert gk.compare_gradient(cost, w, 4 * w ** 3).passed
    wrong = gk.compare_gradient(cost, w, lambda w: 3 * w ** 3)
    assert names_of(wrong.mismatches) == {"x[0]", "x[1]"}


def test_assert_gradient_matches_raises_with_the_report():
    with pytest.raises(gk.GradientMismatchError, match="beta"):
        gk.assert_gradient_matches(sharp_cost("missing term"), sharp_params())


def test_numeric_gradient_comes_back_in_torch_types():
    w = torch.tensor([[0.2, -0.4], [1.0, 0.5]])        # float32
    g = gk.numeric_gradient(lambda w: (w ** 3).sum(), w)
    assert isinstance(g, torch.Tensor) and g.dtype == torch.float32 and g.shape == w.shape
    assert torch.allclose(g, 3 * w ** 2, rtol=1e-6)
    model = torch.nn.Linear(2, 1).double()
    by_name = gk.numeric_gradient(lambda m: m(torch.ones(1, 2, dtype=torch.float64)).sum(), model)
    assert set(by_name) == {"weight", "bias"}
    assert torch.allclose(by_name["weight"], torch.ones(1, 2, dtype=torch.float64))


def test_compare_jacobian_takes_torch_functions_and_autograd_jacobians():
    A = torch.tensor([[1.0, 0.5, -0.2], [0.3, -1.0, 0.8]], dtype=torch.float64)
    fun = lambda w: torch.tanh(A @ w)
    w = torch.tensor([0.2, -0.1, 0.7], dtype=torch.float64)
    report = gk.compare_jacobian(fun, w)
    assert report.passed, report.to_text()
    assert len(report.rows) == 6

    def transposed(w):  # a planted bug: the rows of the last two columns swapped into place
        J = (1 - torch.tanh(A @ w) ** 2)[:, None] * A
        return J.flip(0)
    bad = gk.compare_jacobian(fun, w, transposed)
    assert bad.mismatches and all(r.name.startswith(("y[0] wrt", "y[1] wrt"))
                                  for r in bad.mismatches)


def test_tensor_leaves_in_a_nest_with_plain_floats():
    params = {"w": torch.tensor([1.0, 2.0], dtype=torch.float64), "scale": 0.5}
    report = gk.compare_gradient(lambda p: (p["scale"] * p["w"] ** 2).sum(), params)
    assert report.passed and names_of(report.rows) == {"w[0]", "w[1]", "scale"}


# --- bad input: one clear message each -------------------------------------------------------

def test_a_cost_returning_several_elements():
    with pytest.raises(gk.CheckInputError, match=r"3 elements \(shape \(3,\)\).*0-d tensor"):
        gk.compare_gradient(lambda w: w ** 2, torch.ones(3, dtype=torch.float64))


def test_a_tensor_that_requires_grad_from_numpy_params():
    weight = torch.ones(2, requires_grad=True)
    cost = lambda x: (weight * torch.from_numpy(x)).sum()
    with pytest.raises(gk.CheckInputError, match="gradient=None.*torch value.*numpy params"):
        gk.compare_gradient(cost, np.array([1.0, 2.0]))
    # with a gradient of its own, such a cost is fine: its values are read detached
    assert gk.compare_gradient(cost, np.array([1.0, 2.0]), lambda x: np.ones(2)).passed


def test_a_tensor_on_a_device_without_values():
    with pytest.raises(gk.CheckInputError, match="device meta.*cannot be read"):
        gk.compare_gradient(lambda w: w.sum(), torch.ones(2, device="meta"))


def test_integer_tensors_and_a_bad_keep_precision():
    with pytest.raises(gk.CheckInputError, match="'x' is a torch.int64 tensor.*double"):
        gk.compare_gradient(lambda w: w.sum(), torch.ones(2, dtype=torch.int64))
    with pytest.raises(gk.CheckInputError, match="keep_precision: expected True or False"):
        gk.compare_gradient(lambda w: w.sum(), torch.ones(2), keep_precision="yes")


def test_a_module_without_trainable_parameters():
    model = torch.nn.Linear(2, 1).requires_grad_(False)
    with pytest.raises(gk.CheckInputError, match="no trainable parameters"):
        gk.compare_gradient(lambda m: m(torch.ones(2)).sum(), model)


def test_a_backward_that_raises_is_named():
    class Broken(torch.autograd.Function):
        @staticmethod
        def forward(ctx, x):
            return x * 2

        @staticmethod
        def backward(ctx, g):
            raise RuntimeError("backward not written yet")
    with pytest.raises(gk.CheckInputError, match="torch.autograd could not differentiate.*not "
                                                 "written yet"):
        gk.compare_gradient(lambda w: Broken.apply(w).sum(), torch.ones(2, dtype=torch.float64))


# --- front ends ------------------------------------------------------------------------------

def test_a_declared_case_on_tensors_runs_under_pytest(pytester):
    pytester.makepyfile(test_torch_case="""
        import torch
        import gradcheck_kit as gk

        @gk.case(params={"w": torch.tensor([0.5, -0.25], dtype=torch.float64)})
        def damped_cost(p):
            return (torch.cos(p["w"]) * p["w"]).sum()
    """)
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(passed=1)


class SavedObject:
    """Any Python object beside the tensors: loading it would run unpickling code."""


def test_load_torch_params_reads_tensors_and_refuses_objects(tmp_path):
    model = torch.nn.Linear(2, 1)
    torch.save(model.state_dict(), tmp_path / "start.pt")
    loaded = load_torch_params(tmp_path / "start.pt")
    assert type(loaded) is dict and set(loaded) == {"weight", "bias"}
    assert torch.equal(loaded["weight"], model.weight.detach())

    torch.save({"w": torch.ones(1), "extra": SavedObject()}, tmp_path / "object.pt")
    with pytest.raises(gk.CheckInputError, match="refused"):
        load_torch_params(tmp_path / "object.pt")
    with pytest.raises(gk.CheckInputError, match="no such file"):
        load_torch_params(tmp_path / "missing.pt")
