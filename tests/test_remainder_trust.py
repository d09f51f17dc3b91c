"""The Taylor remainder check decides only what the precision lets it decide.

Its steps fit the dtype of the parameters and of the cost's values, a test in
which no order could be fitted does not pass, and a gradient with NaN or inf
entries is an error.  The costs and points are invented; the rule that the
remainder of a right gradient is O(h^2) and of a wrong one O(h) is common
practice (Taylor's theorem).
"""
import numpy as np
import pytest

import gradcheck_kit as gk

MIX = np.array([[0.5, -0.3, 0.8, 0.1, -0.6, 0.2, 0.4, -0.7],
                [0.2, 0.9, -0.4, 0.3, 0.1, -0.5, 0.6, 0.2]])
POINT = np.array([0.3, -0.8, 1.2, 0.5, -0.2, 0.9, -1.1, 0.4])
# seven of eight coordinates off by 1 to 8 percent, in both directions
SEVEN_OFF = np.array([1.0, 1.01, 0.97, 1.08, 1.03, 0.95, 1.05, 0.98])


def quadratic(x):
    return np.sum(x * x * np.arange(1, x.size + 1, dtype=x.dtype)) * x.dtype.type(0.5)


def quadratic_gradient(x):
    return x.astype(float) * np.arange(1, x.size + 1)


def exp_log(x):
    return np.sum(np.exp(x)) + np.log(np.sum(x * x) + x.dtype.type(1))


def exp_log_gradient(x):
    x = x.astype(float)
    return np.exp(x) + 2 * x / (np.sum(x * x) + 1)


def tanh_model(x):
    return np.sum(np.tanh(MIX.astype(x.dtype) @ x) ** 2)


def tanh_model_gradient(x):
    t = np.tanh(MIX @ x.astype(float))
    return MIX.T @ (2 * t * (1 - t * t))


COSTS = [(quadratic, quadratic_gradient), (exp_log, exp_log_gradient),
         (tanh_model, tanh_model_gradient)]
NAMES = ["quadratic", "exp-log", "tanh-model"]


@pytest.mark.parametrize("cost, gradient", COSTS, ids=NAMES)
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("seed", range(3))
def test_right_gradients_pass_with_order_two(cost, gradient, dtype, seed):
    result = gk.remainder_order(cost, POINT.astype(dtype), gradient, seed=seed)
    assert result.passed and abs(result.order - 2) <= 0.3, result


@pytest.mark.parametrize("cost, gradient", COSTS, ids=NAMES)
@pytest.mark.parametrize("seed", range(3))
def test_float32_gradient_with_seven_of_eight_entries_off_by_percents_fails(cost, gradient,
                                                                          seed):
    x = POINT.astype(np.float32)
    result = gk.remainder_order(cost, x, lambda v: gradient(v) * SEVEN_OFF, seed=seed)
    assert not result.passed, result
    assert result.order < 1.5, result


def float16_cost(v):
    return np.sum(np.tanh(v) ** 2, dtype=np.float16)


def float16_cost_gradient(v):
    t = np.tanh(v.astype(float))
    return 2 * t * (1 - t ** 2)


X16 = np.linspace(-1, 1, 6).astype(np.float16)


@pytest.mark.parametrize("seed", range(5))
def test_float16_gradient_one_and_a_half_times_off_fails(seed):
    result = gk.remainder_order(float16_cost, X16, lambda v: 1.5 * float16_cost_gradient(v),
                            seed=seed)
    assert not result.passed, result


@pytest.mark.parametrize("seed", range(5))
def test_float16_cost_with_the_right_gradient_passes_or_says_it_cannot_tell(seed):
    """float16 values carry three digits: the test may not resolve the curvature, and
    then it says so and does not pass; it must never call the right gradient wrong
    with a fitted order of about 1."""
    result = gk.remainder_order(float16_cost, X16, float16_cost_gradient, seed=seed)
    if not np.isfinite(result.order):
        assert not result.passed and "nothing was decided" in result.message
    else:
        assert result.order > 1.5 and result.passed, result


def test_float16_parameters_of_a_double_precision_cost_get_steps_they_can_hold():
    def cost(v):
        return np.sum(np.tanh(v.astype(np.float64)) ** 2)
    right = [gk.remainder_order(cost, X16, float16_cost_gradient, seed=s) for s in range(5)]
    assert all(r.passed for r in right), [str(r) for r in right]
    # no step below what a float16 coordinate can resolve
    assert right[0].steps.min() >= 8 * np.finfo(np.float16).eps
    wrong = [gk.remainder_order(cost, X16, lambda v: 1.5 * float16_cost_gradient(v), seed=s)
             for s in range(5)]
    assert not any(r.passed for r in wrong)


def test_steps_follow_the_precision():
    f64 = gk.remainder_order(quadratic, POINT, quadratic_gradient, seed=0)
    f32 = gk.remainder_order(quadratic, POINT.astype(np.float32), quadratic_gradient, seed=0)
    # float64 reaches well below sqrt(eps); float32 stops where its rounding takes over
    assert f64.steps.min() < 2.0 ** -30
    assert 2.0 ** -23 < f32.steps.min() < 2.0 ** -16
    assert np.all(np.diff(f64.steps) < 0) and f64.steps.max() <= 0.5


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_gradient_is_an_error_not_linear(bad):
    def gradient(v):
        g = quadratic_gradient(v)
        g[3] = bad
        return g
    result = gk.remainder_order(quadratic, POINT, gradient, seed=0)
    assert not result.passed
    assert "not finite" in result.message and "x[3]" in result.message
    assert "linear" not in result.message
    assert np.isnan(result.order) and "no order fitted" in str(result)


def test_non_finite_gradient_in_a_tree_names_the_entry():
    params = {"w": np.array([0.2, -0.4]), "b": np.array(0.5)}

    def cost(p):
        return np.sum(p["w"] ** 2) + p["b"] ** 2
    result = gk.remainder_order(cost, params, {"w": np.array([0.4, np.nan]), "b": 1.0})
    assert not result.passed and "w[1]" in result.message


def test_cannot_tell_is_not_a_pass():
    """Along a linear cost the remainder is rounding at every step: no order, no pass."""
    result = gk.remainder_order(lambda x: 3.0 * np.sum(x), np.array([0.4, -1.2, 2.0]),
                            lambda x: np.full(3, 3.0), seed=0)
    assert not result.passed and np.isnan(result.order)
    assert "nothing was decided" in result.message


def test_imprecise_values_that_hide_the_curvature_are_not_a_pass():
    """A float32 cost of about 1e6 resolves only 0.06: its curvature never shows."""
    x = np.array([0.3, -0.5, 0.8], dtype=np.float32)

    def cost(v):
        return np.float32(1e6) + np.sum(np.sin(v))
    result = gk.remainder_order(cost, x, lambda v: np.cos(v.astype(float)), seed=0)
    assert not result.passed and "nothing was decided" in result.message


def test_scale_errors_cannot_cancel_along_the_direction():
    """The direction follows the gradient's signs, so a gradient off by a constant factor
    always changes g.v (with random signs, g.v can be near zero by chance)."""
    for seed in range(10):
        result = gk.remainder_order(exp_log, POINT.astype(np.float32),
                                lambda v: 1.02 * exp_log_gradient(v), seed=seed)
        assert not result.passed, result


def test_users_arrays_are_unchanged():
    x = POINT.astype(np.float32)
    before = x.copy()
    gk.remainder_order(tanh_model, x, tanh_model_gradient, seed=0)
    np.testing.assert_array_equal(x, before)


def test_a_direction_across_a_kink_decides_nothing_and_says_so():
    """relu is piecewise linear (common practice): across its kink the remainder is O(h),
    below the crossing it is rounding; a right gradient must not read as order 1."""
    w = np.array([1.0, 2.0, 3.0])
    result = gk.remainder_order(lambda v: np.sum(np.maximum(v, 0) * w),
                                np.array([0.001, -0.002, 0.5]), lambda v: (v > 0) * w, seed=0)
    assert not result.passed and result.kink_step is not None
    assert "kink" in result.message and "nothing was decided" in result.message
    assert not result.wrong


@pytest.mark.parametrize("seed", range(3))
def test_a_smooth_wrong_gradient_is_not_taken_for_a_kink(seed):
    result = gk.remainder_order(exp_log, POINT, lambda v: 1.01 * exp_log_gradient(v), seed=seed)
    assert result.kink_step is None and result.wrong and not result.passed
