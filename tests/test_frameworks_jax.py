"""JAX code as input of the checks: jax arrays, jax.grad / jax.jacrev as the analytic side.

Closed forms used as references (sources beside each test):
- softmax cross-entropy: d/dz of -log softmax(z)_y is softmax(z) - e_y, a standard result
  (common practice; e.g. Bishop, Pattern Recognition and Machine Learning, eq. 4.109);
- layer normalisation without affine terms: dL/dx = (g - mean(g) - y mean(g y)) / sigma,
  with y = (x - mu) / sigma, sigma = sqrt(var + eps) (hand-derived from the definition in
  Ba, Kiros & Hinton, "Layer Normalization", 2016; checked against mpmath in
  test_frameworks_torch.py);
- convolution: lax.conv_general_dilated computes a cross-correlation (no kernel flip, as
  in its documentation), so the gradient of sum(g * conv(x, w)) in w[a, b] is
  sum_ij g[i, j] x[i + a, j + b] (from the definition).
"""
import numpy as np
import pytest

jax = pytest.importorskip("jax", reason="JAX is not installed (pip install jax)")
import jax.numpy as jnp  # noqa: E402

import gradcheck_kit as gk  # noqa: E402


def names_of(rows):
    return {r.name for r in rows}


def within_promise(report, exact: dict):
    for r in report.rows:
        assert abs(r.numeric - exact[r.name]) <= r.error_estimate, (r.name, r.numeric,
                                                                   exact[r.name])


# --- a custom_vjp rule: a numerically stable log(1 + e^(s x)) / s ---------------------------------

def sharp_softplus(bug=None):
    @jax.custom_vjp
    def f(x, s):
        return jnp.logaddexp(0.0, s * x) / s

    def forward(x, s):
        return f(x, s), (x, s)

    def backward(res, g):
        x, s = res
        sig = jax.nn.sigmoid(s * x)
        dx = g * sig
        ds = jnp.sum(g * (x * sig / s - jnp.logaddexp(0.0, s * x) / s ** 2))
        if bug == "sign":
            dx = -dx
        if bug == "missing term":
            ds = jnp.sum(g * x * sig / s)
        return dx, ds

    f.defvjp(forward, backward)
    target = jnp.linspace(0.2, 1.4, 5)
    return lambda p: jnp.sum((f(p["x"], p["s"]) - target) ** 2)


PARAMS = {"x": jnp.array([-1.2, -0.3, 0.4, 0.9, 1.7]), "s": jnp.array(1.6)}   # float32


def test_a_correct_custom_vjp_passes():
    report = gk.compare_gradient(sharp_softplus(), PARAMS)
    assert report.passed, report.to_text()
    assert any("jax.grad" in n for n in report.notes)
    assert any("float64 copies" in n for n in report.notes)


def test_a_wrong_sign_and_a_missing_term_fail_where_they_are():
    assert names_of(gk.compare_gradient(sharp_softplus("sign"), PARAMS).mismatches) == \
        {f"x[{i}]" for i in range(5)}
    assert names_of(gk.compare_gradient(sharp_softplus("missing term"), PARAMS).mismatches) == \
        {"s"}


def square_linear(bug=None):
    @jax.custom_vjp
    def affine(x, W, b):
        return W @ x + b

    def forward(x, W, b):
        return affine(x, W, b), (x, W)

    def backward(res, g):
        x, W = res
        dW = jnp.outer(g, x)
        return W.T @ g, dW.T if bug == "transposed" else dW, g

    affine.defvjp(forward, backward)
    target = jnp.array([0.5, -1.0, 2.0])
    return lambda p: jnp.sum((jnp.tanh(affine(p["x"], p["W"], p["b"])) - target) ** 2)


def test_a_transposed_weight_gradient_fails_off_the_diagonal():
    rng = np.random.default_rng(3)
    params = {"x": jnp.asarray(rng.normal(size=3)), "W": jnp.asarray(rng.normal(size=(3, 3))),
              "b": jnp.asarray(rng.normal(size=3))}
    assert gk.compare_gradient(square_linear(), params).passed
    report = gk.compare_gradient(square_linear("transposed"), params)
    assert names_of(report.mismatches) == {f"W[{i}, {j}]" for i in range(3) for j in range(3)
                                           if i != j}


def test_a_custom_jvp_rule_is_what_is_checked():
    @jax.custom_jvp
    def clipped_log(x):
        return jnp.log1p(x ** 2)

    @clipped_log.defjvp
    def clipped_log_jvp(primals, tangents):
        (x,), (t,) = primals, tangents
        return clipped_log(x), t * x / (1 + x ** 2)      # planted bug: the factor 2 is missing
    report = gk.compare_gradient(lambda x: jnp.sum(clipped_log(x)), jnp.array([0.5, -2.0]))
    assert names_of(report.mismatches) == {"x[0]", "x[1]"}


# --- jax's own derivatives of standard operations, against closed forms -----------------------

def test_softmax_cross_entropy_matches_p_minus_y():
    z = jnp.array([[1.5, -0.3, 0.2, 0.9], [-1.1, 0.4, 2.2, 0.0]])
    labels = np.array([3, 1])
    cost = lambda z: -jnp.mean(jax.nn.log_softmax(z)[jnp.arange(2), labels])
    report = gk.compare_gradient(cost, z)
    assert report.passed, report.to_text()
    zf = np.asarray(z, dtype=np.float64)
    p = np.exp(zf - zf.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    exact = (p - np.eye(4)[labels]) / 2        # standard result, mean over 2 rows
    within_promise(report, {f"x[{i}, {j}]": exact[i, j] for i in range(2) for j in range(4)})


def test_layer_norm_matches_its_closed_form():
    x = np.array([0.3, -1.2, 2.5, 0.8, -0.4])
    g = np.array([1.0, -0.5, 0.25, 2.0, -1.5])
    eps = 1e-5

    def layer_norm(v):
        mu = jnp.mean(v)
        return (v - mu) / jnp.sqrt(jnp.mean((v - mu) ** 2) + eps)
    start = jnp.asarray(x)                                   # float32
    report = gk.compare_gradient(lambda v: jnp.sum(g * layer_norm(v)), start)
    assert report.passed, report.to_text()
    x = np.asarray(start, dtype=np.float64)                  # the point that was checked
    sigma = np.sqrt(x.var() + eps)
    y = (x - x.mean()) / sigma
    exact = (g - g.mean() - y * np.mean(g * y)) / sigma
    within_promise(report, {f"x[{i}]": exact[i] for i in range(5)})


def test_a_small_convolution_matches_the_cross_correlation():
    rng = np.random.default_rng(7)
    x, g = rng.normal(size=(4, 4)), rng.normal(size=(3, 3))

    def cost(w):
        out = jax.lax.conv_general_dilated(jnp.asarray(x)[None, None], w[None, None], (1, 1),
                                           "VALID")
        return jnp.sum(g * out[0, 0])
    report = gk.compare_gradient(cost, jnp.asarray(rng.normal(size=(2, 2))))
    assert report.passed, report.to_text()
    exact = {f"x[{a}, {b}]": sum(g[i, j] * x[i + a, j + b] for i in range(3) for j in range(3))
             for a in range(2) for b in range(2)}
    within_promise(report, exact)


# --- precision, transforms, front doors ---------------------------------------------------

def test_inputs_and_the_global_precision_setting_are_left_alone():
    before = {k: np.array(v) for k, v in PARAMS.items()}
    x64 = jax.config.jax_enable_x64
    gk.compare_gradient(sharp_softplus(), PARAMS)
    assert jax.config.jax_enable_x64 == x64
    for k, v in PARAMS.items():
        assert v.dtype == jnp.float32 and np.array_equal(np.array(v), before[k])


def test_keep_precision_checks_float32_as_it_runs():
    report = gk.compare_gradient(sharp_softplus(), PARAMS, keep_precision=True)
    assert report.passed
    assert not any("float64 copies" in n for n in report.notes)
    assert any("float32" in n for n in report.notes)


def test_the_complex_step_where_the_jax_cost_is_complex_safe():
    w = jnp.array([0.4, 1.3, -0.8])
    assert gk.compare_gradient(lambda w: jnp.sum(jnp.sin(w) * w ** 3), w).method == \
        "complex-step"
    assert gk.compare_gradient(lambda w: jnp.sum(jnp.abs(w) * w), w).method == "richardson"


def test_vectorized_runs_through_jax_vmap_and_falls_back_with_a_note():
    calls = {"n": 0}
    A = jnp.linspace(-1.0, 2.0, 18).reshape(3, 6)

    def cost(w):
        calls["n"] += 1
        return jnp.sum(jnp.log1p((A @ w) ** 2))
    w = jnp.linspace(-0.6, 0.4, 6)
    plain = gk.compare_gradient(cost, w)
    plain_calls, calls["n"] = calls["n"], 0
    report = gk.compare_gradient(cost, w, vectorized=True)
    assert plain.passed and report.passed
    assert not any("could not batch" in n for n in report.notes)
    assert calls["n"] < plain_calls / 3

    def concrete(w):
        return jnp.sum(w ** 2) + float(w[0])             # float(): not traceable under vmap
    fallback = gk.compare_gradient(concrete, w, lambda w: 2 * w + jnp.eye(6)[0],
                                   vectorized=True)
    assert fallback.passed
    assert any("jax.vmap could not batch the cost" in n for n in fallback.notes)


def test_numeric_gradient_comes_back_as_jax_arrays():
    w = jnp.array([[0.2, -0.4], [1.0, 0.5]])
    g = gk.numeric_gradient(lambda w: jnp.sum(w ** 3), w)
    assert isinstance(g, jax.Array) and g.dtype == jnp.float32
    assert np.allclose(np.asarray(g), 3 * np.asarray(w) ** 2, rtol=1e-6)


def test_compare_jacobian_with_jacrev():
    A = jnp.array([[1.0, 0.5, -0.2], [0.3, -1.0, 0.8]])
    fun = lambda w: jnp.tanh(A @ w)
    w = jnp.array([0.2, -0.1, 0.7])
    report = gk.compare_jacobian(fun, w)
    assert report.passed and len(report.rows) == 6
    bad = gk.compare_jacobian(fun, w, lambda w: jax.jacrev(fun)(w)[::-1])
    assert bad.mismatches


def test_a_gradient_function_in_jax_types():
    w = jnp.array([0.5, -1.5])
    assert gk.compare_gradient(lambda w: jnp.sum(w ** 4), w, lambda w: 4 * w ** 3).passed
    assert not gk.compare_gradient(lambda w: jnp.sum(w ** 4), w, lambda w: 3 * w ** 3).passed


# --- bad input ------------------------------------------------------------------------------

def test_a_cost_returning_several_elements():
    with pytest.raises(gk.CheckInputError, match=r"jax value with 3 elements.*0-d"):
        gk.compare_gradient(lambda w: w ** 2, jnp.ones(3))


def test_a_jax_cost_of_numpy_params_without_a_gradient():
    with pytest.raises(gk.CheckInputError, match="gradient=None.*jax value.*numpy params"):
        gk.compare_gradient(lambda w: jnp.sum(jnp.asarray(w) ** 2), np.ones(2))


def test_integer_arrays_are_refused():
    with pytest.raises(gk.CheckInputError, match="'x' is a int32 array"):
        gk.compare_gradient(lambda w: jnp.sum(w), jnp.arange(3))


def test_mixed_frameworks_in_one_tree():
    torch = pytest.importorskip("torch", reason="PyTorch is not installed")
    params = {"w": torch.ones(2), "b": jnp.ones(2)}
    with pytest.raises(gk.CheckInputError, match=r"mixes torch values \(first at 'w'\) and jax "
                                                 r"values \(first at 'b'\)"):
        gk.compare_gradient(lambda p: p["w"].sum(), params)
