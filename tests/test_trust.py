"""Issue 9: verdicts a user can trust.  Each test is a case that was seen to cry wolf
or stay silent, with its cause fixed in the engine (see README "How a verdict is decided").
Facts of the trade (common practice, no source): relu is piecewise linear with one-sided
slopes at 0; log and sqrt are undefined below 0; a Cholesky factor of a symmetric positive
definite matrix gives log det = 2 sum log diag(L)."""
import warnings

import autograd.numpy as anp
import numpy as np
import pytest

import gradcheck_kit as gk

METHODS = ["auto", "central", "forward", "backward", "five-point", "richardson",
           "complex-step"]

# --- 1. a kink at an exact zero ------------------------------------------------------------
X = np.array([[1, -1, 0], [.5, .5, 1], [2, 0, -1], [1, 2, 3]])
W = np.array([1, 1, -.5])            # X[0] @ W is exactly 0


def relu_sum(w):
    return np.sum(np.maximum(X @ w, 0))


@pytest.mark.parametrize("convention", [0.0, 1.0])
@pytest.mark.parametrize("method", METHODS)
def test_a_relu_at_its_hinge_is_a_kink_for_every_method(method, convention):
    def gradient(w):
        z = X @ w
        return X.T @ np.where(z > 0, 1.0, np.where(z == 0, convention, 0.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # complex step falls back
        report = gk.compare_gradient(relu_sum, W, gradient, method=method)
    assert report.passed, report.to_text()
    assert report.counts.get("kink", 0) >= 1, report.to_text()


def test_a_kink_on_curved_pieces_allows_the_slopes_their_step_error():
    """A ReLU layer under a squared loss, zero biases and an all-zero input row: the
    bias pre-activations are exactly 0, and the pieces on either side are curved."""
    rng = np.random.default_rng(3)
    inputs = rng.standard_normal((5, 3))
    inputs[2] = 0.0
    target = rng.standard_normal(5)
    w1 = rng.standard_normal((3, 4))
    w2 = rng.standard_normal(4)

    def cost(b):
        hidden = np.maximum(inputs @ w1 + b, 0)
        return 0.5 * np.sum((hidden @ w2 - target) ** 2)

    def gradient(b):          # relu'(0) = 1 at the hinge: a one-sided slope
        z = inputs @ w1 + b
        r = np.maximum(z, 0) @ w2 - target
        return ((z >= 0) * (r[:, None] * w2[None, :])).sum(axis=0)
    for method in ("auto", "central", "richardson", "five-point"):
        report = gk.compare_gradient(cost, np.zeros(4), gradient, method=method)
        assert report.passed and report.counts.get("kink"), report.to_text()


def test_a_wrong_slope_at_a_kink_still_fails():
    def gradient(w):
        return X.T @ (X @ w > 0) + np.array([5.0, 0, 0])
    assert not gk.compare_gradient(relu_sum, W, gradient).passed


# --- 2. a non-finite value stays local -----------------------------------------------------
Y, MU = np.array([0.3, -0.2]), np.array([0.1, 0.1])


def gaussian_nll(p):
    return 0.5 * anp.sum(anp.log(p["var"]) + (Y - p["mu"]) ** 2 / p["var"])


@pytest.mark.parametrize("method", METHODS)
def test_a_step_across_zero_is_redone_for_that_coordinate_only(method):
    params = {"mu": MU, "var": np.array([1e-7, 1.0])}
    report = gk.compare_gradient(gaussian_nll, params, method=method)
    assert report.passed, report.to_text()
    right = gk.compare_gradient(lambda x: anp.sum(anp.log(x)), np.array([1e-8, 1.0, 3.0]),
                                method=method)
    assert right.passed, right.to_text()


def test_the_report_says_where_the_cost_was_undefined():
    report = gk.compare_gradient(lambda x: anp.sum(anp.log(x)), np.array([1e-8, 1.0, 3.0]),
                                 method="richardson")
    row = next(r for r in report.rows if r.name == "x[0]")
    assert "not finite" in row.detail
    assert any("not finite at some stencil points of 1 coordinate (x[0])" in n
               for n in report.notes)
    assert all(r.detail == "" for r in report.rows if r.name != "x[0]")


def test_a_wrong_gradient_near_the_edge_is_still_caught():
    report = gk.compare_gradient(lambda x: anp.sum(anp.log(x)), np.array([1e-8, 1.0, 3.0]),
                                 lambda x: 1 / x + np.array([1e6, 0, 0]), method="richardson")
    assert [r.name for r in report.mismatches] == ["x[0]"], report.to_text()


def test_a_nan_the_cost_never_reads_does_not_spoil_the_others():
    params = {"a": np.array([1.0, 2.0]), "b": np.array([np.nan, 1.0])}
    before = {k: v.copy() for k, v in params.items()}
    report = gk.compare_gradient(lambda p: anp.sum(p["a"] ** 2), params)
    assert report.passed, report.to_text()
    assert any("non-finite entries (b[0])" in n for n in report.notes)
    np.testing.assert_array_equal(params["b"], before["b"])


# --- 3. the complex-safety probe -------------------------------------------------------------
def cholesky_logdet(p):
    a = np.array([[2.0, 0.3], [0.3, 1.0]]) + np.diag(p ** 2)
    return 2 * np.sum(np.log(np.diag(np.linalg.cholesky(a))))


def cholesky_logdet_gradient(p):
    a = np.array([[2.0, 0.3], [0.3, 1.0]]) + np.diag(p ** 2)
    return 2 * p * np.diag(np.linalg.inv(a))


def test_a_requested_complex_step_on_a_cost_that_is_not_complex_safe_falls_back():
    p = np.array([0.7, -0.4])
    with pytest.warns(RuntimeWarning, match="complex_safe=True"):
        report = gk.compare_gradient(cholesky_logdet, p, cholesky_logdet_gradient,
                                     method="complex-step")
    assert report.passed and report.method == "richardson", report.to_text()
    assert any("richardson was used instead" in n for n in report.notes)


def test_abs_inside_the_cost_is_not_taken_for_complex_safe():
    def cost(x):     # abs() keeps the value real-valued at complex points: not analytic
        return np.sum(np.abs(x) ** 3) / 3 + np.sum(x)

    def gradient(x):
        return np.abs(x) * x + 1
    x = np.array([1.0, -2.0, 0.5, 3.0])
    report = gk.compare_gradient(cost, x, gradient)
    assert report.passed and report.method == "richardson", report.to_text()


def test_complex_safe_true_insists_on_the_complex_step():
    report = gk.compare_gradient(lambda x: np.sum(x ** 3), np.array([1.0, 2.0]),
                                 lambda x: 3 * x ** 2, method="complex-step", complex_safe=True)
    assert report.method == "complex-step" and report.passed


def test_complex_safe_must_be_a_bool_or_none():
    with pytest.raises(gk.CheckInputError, match="complex_safe"):
        gk.compare_gradient(lambda x: np.sum(x ** 2), np.ones(2), complex_safe="yes")


# --- 5. periodic noise that one spacing would alias ------------------------------------------
@pytest.mark.parametrize("seed", range(12))
def test_periodic_noise_is_seen_along_some_line(seed):
    r = np.random.default_rng(seed).standard_normal(6)
    x = np.random.default_rng(100 + seed).uniform(-1, 1, 6)

    def cost(v):
        return 10 + np.sum(v ** 2) + 1e-8 * np.sin(1e8 * (v @ r))
    report = gk.compare_gradient(cost, x, lambda v: 2 * v)
    assert report.passed, report.to_text()


# --- 6. a float32 analytic gradient of a float64 cost ----------------------------------------
def test_a_float32_gradient_is_allowed_its_own_rounding():
    x = np.linspace(0.3, 2.0, 8)

    def gradient(v):
        return (np.exp(v) * 1000.0).astype(np.float32)
    report = gk.compare_gradient(lambda v: 1000.0 * np.sum(np.exp(v)), x, gradient)
    assert report.passed, report.to_text()
    assert any("lower precision" in n for n in report.notes)
    wrong = gk.compare_gradient(lambda v: 1000.0 * np.sum(np.exp(v)), x,
                                lambda v: gradient(v) * np.float32(1.01))
    assert not wrong.passed


def test_a_small_error_in_a_float32_gradient_is_still_caught():
    """float32 rounding is about 6e-8 relative; an error of 0.1% is 17,000 times that."""
    rng = np.random.default_rng(2)
    m, t, w = rng.normal(size=(20, 5)), rng.normal(size=20), rng.normal(size=5)

    def cost(v):
        return 0.5 * np.sum((m @ v - t) ** 2)

    def gradient(v, factor=1.0):
        g = m.T @ (m @ v - t)
        g[2] *= factor
        return g.astype(np.float32)
    assert gk.compare_gradient(cost, w, gradient).passed
    for factor in (1.001, 1.002, 1.01):
        report = gk.compare_gradient(cost, w, lambda v, f=factor: gradient(v, f))
        assert [r.name for r in report.mismatches] == ["x[2]"], report.to_text()


# --- 8. quantized costs ----------------------------------------------------------------------
def test_a_quantized_cost_never_passes_a_zero_gradient():
    def cost(x):
        return float(int(np.sum(x ** 2) * 100))
    x = np.array([3.0, 4.0, 5.0])
    report = gk.compare_gradient(cost, x, lambda v: np.zeros(3), method="richardson")
    assert not report.passed, report.to_text()
    assert not any(r.verdict == "agree" and r.relative_error > 0.5 for r in report.rows)


# --- a zero gradient where slope and curvature vanish (x^3 at 0) ------------------------
@pytest.mark.parametrize("method", ["central", "forward", "five-point", "richardson", "auto"])
def test_a_zero_gradient_at_an_inflection_agrees_and_a_small_error_there_is_caught(method):
    # x^3 / 3 at 0: f' = f'' = 0, so a central difference returns its own truncation
    # h^2 / 3, "far" from 0 relatively but negligible next to the cost's variation (its
    # third derivative); common practice (Taylor's theorem).
    def cost(x):
        return np.sum(x ** 3) / 3
    right = gk.compare_gradient(cost, np.zeros(3), lambda x: x ** 2, method=method)
    assert right.passed and right.counts == {"agree": 3}, right
    wrong = gk.compare_gradient(cost, np.zeros(3), lambda x: x ** 2 + 1e-3, method=method)
    assert wrong.counts == {"disagree": 3}, wrong


# --- a cost rounded so coarsely that every stencil is flat ---------------------------
@pytest.mark.parametrize("quantum", [1e-3, 1e-2])
def test_a_zero_gradient_of_a_coarsely_rounded_cost_does_not_pass(quantum):
    # round(f / q) * q is flat over the automatic steps (about 1e-5) but not over a few
    # hundredths: the noise line sees nothing, a coarser look sees the jumps, and a zero
    # difference over a flat stencil is undecided, not evidence (common practice: a
    # quantized output's derivative is zero almost everywhere).
    def cost(v):
        return float(np.round(np.sum(v ** 2) / quantum) * quantum)
    x = np.array([0.3, -1.2, 0.7])
    for gradient in (lambda v: 0 * v, lambda v: 2 * v):
        report = gk.compare_gradient(cost, x, gradient)
        assert not report.passed and report.counts == {"noisy": 3}, report
        assert any("step=" in p for p in report.problems)
    # a step that crosses the jumps decides: the zero gradient is then wrong
    wrong = gk.compare_gradient(cost, x, lambda v: 0 * v, step=0.05, method="central")
    assert wrong.counts == {"disagree": 3}


def test_a_cost_that_does_not_depend_on_params_passes_a_zero_gradient():
    report = gk.compare_gradient(lambda v: 3.0, np.array([0.3, -1.2]), lambda v: 0 * v)
    assert report.passed and report.counts == {"agree": 2}


# --- a cost flat along one noise line, or flat near the point, is not quantized --------------
@pytest.mark.parametrize("method", METHODS)
def test_a_softmax_along_a_direction_it_does_not_depend_on_raises_no_alarm(method):
    # Softmax cross-entropy is unchanged by an equal shift of its logits (common practice).
    # The logits here are +-x, signed like the first noise line's direction, so that line
    # runs exactly along such a shift and its values never change; the other lines do.
    from gradcheck_kit.probes import noise_direction
    x = np.array([0.3, -0.2, 0.5, 0.1, -0.4, 0.2])
    sign = np.sign(noise_direction(x.size, np.ones(x.size), 0))

    def cost(v):
        z = sign * v
        m = z.max()
        return m + np.log(np.sum(np.exp(z - m))) - z[2]

    def gradient(v):
        p = np.exp(sign * v - np.max(sign * v))
        p /= p.sum()
        p[2] -= 1
        return sign * p
    report = gk.compare_gradient(cost, x, gradient, method=method)
    assert report.passed and report.counts == {"agree": 6}, report.to_text()
    assert not any("piecewise constant" in n for n in report.notes), report.notes
    wrong = gk.compare_gradient(cost, x, lambda v: 1.01 * gradient(v), method=method)
    assert wrong.counts.get("disagree", 0) >= 5, wrong.to_text()


@pytest.mark.parametrize("method", ["auto", "complex-step", "central"])
def test_a_softmax_layer_whose_first_noise_line_is_an_equal_shift_raises_no_alarm(method):
    # Seen on the 4x3 softmax layer of ml_losses.py drawn with seed 5: the first noise
    # line's signs line up along each row of W and along b, so the line shifts every
    # sample's logits equally; its values were flat, rounding-level changes farther out
    # were taken for quantization, and every coordinate came back 'noisy' (a failed check).
    import ml_losses      # tests/ is on sys.path
    case = ml_losses.softmax_cross_entropy(np.random.default_rng(5))
    report = gk.compare_gradient(case.cost, case.params, case.gradient, method=method)
    assert report.passed and report.counts == {"agree": 15}, report.to_text()


FLAT_HERE = {
    # 1 + sum(x^8): every noise line rounds to exactly 1; a flat minimum, smooth farther out
    "flat minimum": (lambda v: 1.0 + np.sum(v ** 8), lambda v: 8 * v ** 7, np.zeros(3)),
    # an epsilon-insensitive loss inside its dead zone (a plateau between two hinges)
    "dead zone": (lambda v: np.sum(np.maximum(np.abs(v - 0.2) - 0.05, 0.0)),
                  lambda v: np.where(np.abs(v - 0.2) > 0.05, np.sign(v - 0.2), 0.0),
                  np.full(3, 0.2)),
    # x - clip(x, -a, a), monotone with a plateau in the middle (a soft-threshold residual)
    "plateau on a climb": (lambda v: 2.0 + np.sum(v - np.clip(v, -0.04, 0.04)),
                           lambda v: (np.abs(v) > 0.04).astype(float), np.zeros(3)),
}


@pytest.mark.parametrize("name", sorted(FLAT_HERE))
def test_a_cost_flat_near_the_point_but_not_rounded_passes_its_zero_gradient(name):
    cost, gradient, x = FLAT_HERE[name]
    report = gk.compare_gradient(cost, x, gradient)
    assert report.passed and report.counts == {"agree": 3}, report.to_text()
    assert not any("piecewise constant" in n for n in report.notes), report.notes


@pytest.mark.parametrize("values, expected", [
    ([0, 0, 0, 1, 1, 1, 1, 2, 2], True),      # jumps standing alone between repeats
    ([3, 2, 2, 1, 0, -1, -2, -2, -3], True),  # a staircase: two treads between falls
    ([0, 0, 0, 0, 1, 2, 3, 4, 5], False),     # a hinge: a plateau next to a slope
    ([2, 1, 0, 0, 0, 0, 0, 1, 2], False),     # a dead zone: one plateau between hinges
    ([2, 1, 1, 1, 1, 1, 1, 0, -1], False),    # one plateau on a climb (soft threshold)
    ([0, 1, 2, 3, 4, 5, 6, 7, 8], False),     # changes at every step
])
def test_looks_quantized_tells_steps_from_plateaus(values, expected):
    from gradcheck_kit.stencils import looks_quantized
    assert looks_quantized(np.array(values, dtype=float) * 1e-3 + 1.0) is expected


# --- the analytic allowance follows the precision: 1000 eps in float64, 250 in float32 -------
def test_a_small_error_in_a_float32_layer_is_caught():
    # A float32 layer sum(tanh(A x)^2) with its float32 gradient A^T (2 t (1 - t^2))
    # (chain rule, common practice): 1000 float32 epsilons of the terms would let this
    # 0.1% error through; the complex step (auto) sees it.
    rng = np.random.default_rng(1)
    a = rng.normal(size=(6, 6)).astype(np.float32)
    x = rng.normal(size=6).astype(np.float32)

    def cost(v):
        return np.sum(np.tanh(a @ v) ** 2)

    def gradient(v, factor=1.0):
        t = np.tanh(a @ v)
        g = a.T @ (2 * t * (1 - t ** 2))
        g[1] *= np.float32(factor)
        return g
    right = gk.compare_gradient(cost, x, gradient)
    assert right.passed, right.to_text()
    off = gk.compare_gradient(cost, x, lambda v: gradient(v, 1.001))
    assert [r.name for r in off.mismatches] == ["x[1]"], off.to_text()
