"""Hints point the right way, or say nothing: factors read from the point's own values,
tests against the tool's own error estimates (never the caller's rtol), no off-by-one
for one missing term, no factor on a kink row, one wording for factors.

The costs are invented; the derivative rules used (d/dp of exp(p), log, squares, the
chain rule through s = exp(p)) are common practice.
"""
import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.hints import describe_factor


def joined(report):
    return " | ".join(report.hints)


# --- a noise variance on a log scale: s = exp(p) -----------------------------------------
R2 = np.array([0.8, 1.7, 0.4])   # squared residuals per output dimension


def log_noise_cost(p):
    s = np.exp(p)
    return np.sum(0.5 * R2 / s + 0.5 * 5 * p)


def derivative_in_s(p):
    """d/ds of the same cost, handed over as if it were d/dp: the chain factor s left out."""
    s = np.exp(p)
    return -0.5 * R2 / s ** 2 + 0.5 * 5 / s


@pytest.mark.parametrize("p0", [np.log(0.1), -6.0, 1.0])
def test_forgotten_log_scale_chain_factor_is_named_not_mean_versus_sum(p0):
    p = np.array([p0, p0 + 0.3, p0 - 0.4])
    report = gk.compare_gradient(log_noise_cost, p, derivative_in_s)
    text = joined(report)
    assert "exp(-p)" in text and "log-scale" in text, report.hints
    assert "mean versus sum" not in text and "constant factor" not in text


def test_one_log_scale_parameter_gives_the_number_and_its_reading():
    """With one coordinate the ratio is one number: both readings are given."""
    report = gk.compare_gradient(lambda p: 0.5 * 0.8 / np.exp(p) + 2.5 * p, np.log(0.1),
                                 lambda p: -0.4 / np.exp(p) ** 2 + 2.5 / np.exp(p))
    text = joined(report)
    assert "10 times the numeric one" in text and "exp(-p)" in text, report.hints
    assert "mean versus sum" not in text


def test_division_by_the_value_is_named():
    x = np.array([0.5, 2.0, 4.0])
    report = gk.compare_gradient(lambda v: np.sum(v ** 3), x, lambda v: 3 * v ** 2 / v)
    assert "1/p" in joined(report), report.hints


def test_a_stray_factor_of_the_value_is_named():
    x = np.array([0.5, 2.0, 4.0])
    report = gk.compare_gradient(lambda v: np.sum(np.sin(v)), x, lambda v: np.cos(v) * v)
    assert "times p," in joined(report) or "times p " in joined(report), report.hints


def test_a_chain_factor_applied_twice_is_named():
    p = np.array([0.2, -0.5, 1.1])
    report = gk.compare_gradient(lambda v: np.sum(np.exp(v)), p, lambda v: np.exp(2 * v))
    assert "exp(p)" in joined(report) and "exp(-p)" not in joined(report), report.hints


def test_regularisation_coefficient_off_is_named():
    lam = 0.05
    W = np.array([[0.3, -1.2], [2.0, 0.7]])
    y = np.array([1.0, -0.5])

    def cost(w):
        return np.sum((w @ y - 1.0) ** 2) + lam * np.sum(w ** 2)

    def half_penalty(w):   # lambda w where the penalty needs 2 lambda w
        return 2 * np.outer(w @ y - 1.0, y) + lam * w
    report = gk.compare_gradient(cost, W, half_penalty)
    text = joined(report)
    assert "regularisation" in text and "c = -0.05" in text, report.hints
    assert "factor:" not in text


# --- mean versus sum: only for an exact integer -------------------------------------------
DATA = np.linspace(-1.0, 2.0, 24)


def mean_cost(w):
    return np.mean((w[0] * DATA + w[1] - 1.0) ** 2)


def mean_gradient(w):
    r = w[0] * DATA + w[1] - 1.0
    return np.array([np.mean(2 * r * DATA), np.mean(2 * r)])


def test_mean_versus_sum_names_k_and_what_it_could_be():
    report = gk.compare_gradient(mean_cost, np.array([0.3, -0.2]),
                                 lambda w: mean_gradient(w) * DATA.size)
    text = joined(report)
    assert "24 times" in text and "mean versus sum" in text and "batch or data size" in text


def test_a_mean_where_a_sum_is_taken_is_one_over_k():
    report = gk.compare_gradient(lambda w: mean_cost(w) * DATA.size, np.array([0.3, -0.2]),
                                 mean_gradient)
    assert "1/24 of the numeric one" in joined(report), report.hints


def test_a_factor_that_is_not_an_integer_is_not_mean_versus_sum():
    report = gk.compare_gradient(mean_cost, np.array([0.3, -0.2]),
                                 lambda w: mean_gradient(w) * 24.3)
    text = joined(report)
    assert "24.3 times" in text and "mean versus sum" not in text, report.hints


@pytest.mark.parametrize("method", ["richardson", "central", "complex-step"])
def test_one_wording_for_a_half(method):
    report = gk.compare_gradient(lambda v: np.sum(np.exp(np.sin(v))), np.array([0.3, 1.1]),
                                 lambda v: 0.5 * np.cos(v) * np.exp(np.sin(v)), method=method)
    text = joined(report)
    assert "1/2 of the numeric one" in text and "0.5" not in text and "0.49" not in text, text


def test_factor_words():
    assert describe_factor(2.0) == "2 times the numeric one"
    assert describe_factor(0.25) == "1/4 of the numeric one"
    assert describe_factor(1.1) == "1.1 times the numeric one"


# --- the caller's rtol never enters a hint -------------------------------------------------
def square_cost(w):
    return np.sum(np.arange(1.0, 10.0).reshape(3, 3) * w ** 2)


def square_gradient(w):
    return 2 * np.arange(1.0, 10.0).reshape(3, 3) * w


W0 = np.array([[0.4, -0.3, 0.9], [1.1, 0.2, -0.6], [0.5, 0.8, 0.7]])


def test_a_loose_rtol_gives_no_false_swap():
    def two_signs(w):
        g = square_gradient(w)
        g[2, 1], g[2, 2] = -g[2, 1], -g[2, 2]
        return g
    report = gk.compare_gradient(square_cost, W0, two_signs, rtol=1.0)
    assert not report.passed
    text = joined(report)
    assert "swapped" not in text and "sign:" in text, report.hints


@pytest.mark.parametrize("rtol", [0.1, 0.3, 0.5])
def test_a_loose_rtol_gives_no_false_missing_term(rtol):
    """Analytic 1.9e-3 against numeric 4.1e-3: wrong, but not zero."""
    x = np.array([4.1e-3 / 2, 0.7])
    report = gk.compare_gradient(lambda v: np.sum(v ** 2), x,
                                 lambda v: 2 * v * np.array([1.9 / 4.1, 1.0]), rtol=rtol)
    assert not report.passed
    assert "missing term" not in joined(report), report.hints


# --- one missing term is not an off-by-one -------------------------------------------------
def test_one_missing_term_is_not_a_shift():
    report = gk.compare_gradient(lambda v: np.sum(v ** 2), np.array([0.0, 1.5, 0.7]),
                                 lambda v: 2 * v * np.array([1.0, 0.0, 1.0]))
    text = joined(report)
    assert "missing term" in text and "x[1]" in text and "shifted" not in text, report.hints


def test_one_missing_term_in_a_jacobian_is_not_a_shift():
    import autograd.numpy as anp

    def fun(v):
        return anp.stack([anp.sum(v ** 2), anp.sum(anp.sin(v))])

    def jac(v):
        return np.stack([2 * v * np.array([1.0, 0.0, 1.0]), np.cos(v)])
    report = gk.compare_jacobian(fun, np.array([0.0, 1.5, 0.7]), jac)
    text = joined(report)
    assert "missing term" in text and "shifted" not in text, report.hints


def test_a_real_shift_is_still_named():
    x = np.linspace(0.5, 1.5, 6)
    right = 2 * np.arange(1.0, 7.0) * x
    report = gk.compare_gradient(lambda v: np.sum(np.arange(1.0, 7.0) * v ** 2), x,
                                 lambda v: np.roll(right, 1))
    assert "shifted" in joined(report)


# --- kinks ---------------------------------------------------------------------------------
def test_no_factor_hint_on_a_kink_row():
    """At x = 0 the central value of relu is the mean of its slopes 0 and 1 (0.5); an
    analytic 2 there is wrong, but 2 / 0.5 = 4 says nothing about a factor."""
    report = gk.compare_gradient(lambda v: np.sum(np.maximum(v, 0.0)), np.array([0.0, 1.0, 2.0]),
                                 lambda v: np.array([2.0, 1.0, 1.0]))
    assert not report.passed and report.rows[0].verdict == "disagree"
    text = joined(report)
    assert "factor" not in text and "mean versus sum" not in text, report.hints
