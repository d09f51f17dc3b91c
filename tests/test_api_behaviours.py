"""Behaviours the README promises at the Python API that no other test exercised: steps
given as a number or as a tree, numeric_gradient with vectorized costs and executors,
Ctrl-C during vectorized and executor runs, bad input to compare_jacobian, namedtuple
parameters and outputs, and CheckInterrupted by name.

Reference values come from arithmetic, not from the code under test: for the cubic
x^3 the central difference with step h is exactly 3 x^2 + h^2, the forward one
3 x^2 + 3 x h + h^2 (expand (x + h)^3; common practice).  With x and h powers of two
or short binary fractions these hold to float64 rounding.
"""
import collections
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

import gradcheck_kit as gk


def cube(p):
    return p["a"] ** 3 + np.sum(p["b"] ** 3)


def cube_gradient(p):
    return {"a": 3 * p["a"] ** 2, "b": 3 * p["b"] ** 2}


CUBE_AT = {"a": 0.75, "b": np.array([-1.5, 2.0])}


# --- step= ------------------------------------------------------------------------------------
@pytest.mark.parametrize("method, error", [
    ("central", lambda x, h: h ** 2),
    ("forward", lambda x, h: 3 * x * h + h ** 2),
    ("backward", lambda x, h: -3 * x * h + h ** 2)])
def test_a_step_given_as_a_number_is_used_for_every_coordinate(method, error):
    x = np.array([0.75, -1.5, 2.0])
    h = 2.0 ** -5
    d = gk.numeric_gradient(lambda v: np.sum(v ** 3), x, method=method, step=h)
    np.testing.assert_allclose(d, 3 * x ** 2 + error(x, h), rtol=1e-12)


def test_a_step_given_as_a_tree_sets_each_coordinates_step():
    steps = {"a": 2.0 ** -4, "b": np.array([2.0 ** -6, 2.0 ** -8])}
    d = gk.numeric_gradient(cube, CUBE_AT, method="central", step=steps)
    assert d["a"] == pytest.approx(3 * 0.75 ** 2 + 2.0 ** -8, rel=1e-12)
    np.testing.assert_allclose(d["b"], 3 * CUBE_AT["b"] ** 2 + steps["b"] ** 2, rtol=1e-12)


def test_compare_gradient_reports_the_numbers_of_the_given_steps():
    steps = {"a": 2.0 ** -4, "b": np.array([2.0 ** -6, 2.0 ** -8])}
    report = gk.compare_gradient(cube, CUBE_AT, cube_gradient, method="central", step=steps)
    numeric = {r.name: r.numeric for r in report.rows}
    expected = {"a": 3 * 0.75 ** 2 + 2.0 ** -8, "b[0]": 3 * 1.5 ** 2 + 2.0 ** -12,
                "b[1]": 3 * 2.0 ** 2 + 2.0 ** -16}
    assert numeric == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("step, words", [
    ({"a": 0.1}, "structure"),
    ({"a": 0.1, "b": np.array([0.1, 0.0])}, "> 0"),
    ({"a": 0.1, "b": np.array([0.1, np.inf])}, "finite"),
    ({"a": 0.1, "b": np.array([0.1, 0.2, 0.3])}, "'b'"),
    (0.0, "> 0")])
def test_a_bad_step_is_refused_by_name(step, words):
    for call in (gk.numeric_gradient, gk.compare_gradient):
        with pytest.raises(gk.CheckInputError) as info:
            call(cube, CUBE_AT, step=step)
        assert "step" in str(info.value) and words in str(info.value), str(info.value)
    assert np.array_equal(CUBE_AT["b"], [-1.5, 2.0])


# --- numeric_gradient, vectorized and with an executor --------------------------------------
W = np.linspace(0.5, 2.0, 9)
X0 = np.linspace(-1.0, 1.0, 9)


def wave(x):                   # one point, or a batch of points on a leading axis
    return np.sum(W * np.cos(x) + 0.1 * x ** 3, axis=-1)


def wave_gradient(x):
    return -W * np.sin(x) + 0.3 * x ** 2


@pytest.mark.parametrize("method", ["central", "five-point", "complex-step"])
def test_numeric_gradient_of_a_vectorized_cost_matches_the_serial_one(method):
    serial = gk.numeric_gradient(wave, X0, method=method)
    batched = gk.numeric_gradient(wave, X0, method=method, vectorized=True)
    np.testing.assert_allclose(batched, serial, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(batched, wave_gradient(X0), rtol=1e-6, atol=1e-9)


def test_numeric_gradient_of_a_vectorized_tree_keeps_the_structure():
    def loss(p):                 # p["W"]: (batch, 2, 2), p["b"]: (batch,)
        return np.sum(np.sin(p["W"]) ** 2, axis=(1, 2)) + p["b"] ** 2

    params = {"W": np.array([[0.1, 0.4], [0.7, -0.3]]), "b": 0.5}
    g = gk.numeric_gradient(loss, params, vectorized=True)
    assert g["W"].shape == (2, 2) and isinstance(g["b"], float)
    np.testing.assert_allclose(g["W"], np.sin(2 * params["W"]), rtol=1e-8)
    assert g["b"] == pytest.approx(1.0, rel=1e-8)


@pytest.mark.parametrize("method", ["central", "richardson"])
def test_numeric_gradient_with_an_executor_matches_the_serial_one(method):
    serial = gk.numeric_gradient(wave, X0, method=method)
    with ThreadPoolExecutor(2) as pool:
        parallel = gk.numeric_gradient(wave, X0, method=method, executor=pool)
    assert np.array_equal(parallel, serial)        # same arithmetic, same order


def test_numeric_gradient_refuses_an_executor_that_is_not_one():
    with pytest.raises(gk.CheckInputError, match="executor"):
        gk.numeric_gradient(wave, X0, executor="four workers")


# --- Ctrl-C: CheckInterrupted with the partial report ----------------------------------------
class InterruptAtCoordinate:
    """A cost that raises KeyboardInterrupt (as Ctrl-C would) the first time it is asked
    for a point that differs from `base` in coordinate `at` alone, that is, when the sweep
    reaches that coordinate; the probes' points (several coordinates moved) pass."""

    def __init__(self, at, base=X0, batched=False):
        self.at, self.base, self.batched = at, base, batched
        self.weights = np.linspace(0.5, 2.0, base.size)

    def __call__(self, x):
        rows = np.atleast_2d(x) if self.batched else x[None, :]
        moved = rows != self.base
        if np.any(moved[:, self.at] & (moved.sum(axis=1) == 1)):
            raise KeyboardInterrupt
        return np.sum(self.weights * np.cos(x) + 0.1 * x ** 3, axis=-1)

    def gradient(self, x):
        return -self.weights * np.sin(x) + 0.3 * x ** 2


def assert_partial_report(info, at, size):
    error = info.value
    assert isinstance(error, gk.CheckInterrupted) and isinstance(error, KeyboardInterrupt)
    report = error.report
    assert report.interrupted and not report.passed
    names = [r.name for r in report.rows]
    assert 0 < len(names) < size and f"x[{at}]" not in names, names
    assert all(r.verdict == "agree" for r in report.rows), report.to_text()
    assert "INTERRUPTED" in report.to_text()


def test_ctrl_c_in_a_vectorized_run_gives_the_partial_report():
    # 1100 coordinates: the README's 4 MiB bound on a batch cuts the central sweep (2200
    # points of 8.8 kB) into 5 batches, so the interrupt comes after two finished ones.
    base = np.linspace(-1.0, 1.0, 1100)
    cost = InterruptAtCoordinate(600, base, batched=True)
    with pytest.raises(gk.CheckInterrupted) as info:
        gk.compare_gradient(cost, base, cost.gradient, method="central", vectorized=True,
                            progress=False)
    assert_partial_report(info, 600, base.size)


def test_ctrl_c_in_an_executor_run_gives_the_partial_report():
    with ThreadPoolExecutor(1) as pool, pytest.raises(gk.CheckInterrupted) as info:
        gk.compare_gradient(InterruptAtCoordinate(6), X0, wave_gradient, method="central",
                            executor=pool, progress=False)
    assert_partial_report(info, 6, X0.size)


def test_check_interrupted_is_caught_by_name_and_as_a_keyboard_interrupt():
    assert "CheckInterrupted" in gk.__all__
    for catch in (gk.CheckInterrupted, KeyboardInterrupt):
        with pytest.raises(catch) as info:
            gk.compare_gradient(InterruptAtCoordinate(4), X0, wave_gradient, method="central",
                                progress=False)
        # a serial sweep goes in order: the coordinates before the fourth are finished
        assert {r.name for r in info.value.report.rows} == {f"x[{i}]" for i in range(4)}


# --- compare_jacobian: bad input ---------------------------------------------------------------
XJ = np.array([0.3, -0.8, 1.2])


def waves(v):
    return np.array([np.sin(v[0]) * v[1], v[2] ** 2, v[0] + v[1] * v[2]])


def waves_jacobian(v):
    return np.array([[np.cos(v[0]) * v[1], np.sin(v[0]), 0.0],
                     [0.0, 0.0, 2 * v[2]],
                     [1.0, v[2], v[1]]])


def jacobian_error(*args, **options):
    with pytest.raises(gk.CheckInputError) as info:
        gk.compare_jacobian(*args, **options)
    return str(info.value), info.value


def test_jacobian_right_passes():      # the reference for the refusals below
    assert gk.compare_jacobian(waves, XJ, waves_jacobian).passed


def test_jacobian_fun_that_is_not_callable():
    text, _ = jacobian_error(np.ones(3), XJ, waves_jacobian)
    assert "fun" in text and "callable" in text and "ndarray" in text


def test_jacobian_refuses_vectorized():
    text, _ = jacobian_error(waves, XJ, waves_jacobian, vectorized=True)
    assert "vectorized" in text


def test_jacobian_array_of_the_wrong_shape_says_expected_and_got():
    text, _ = jacobian_error(waves, XJ, np.zeros((3, 2)))
    assert "(3, 3)" in text and "(3, 2)" in text


def test_jacobian_function_that_raises_is_chained():
    def broken(v):
        raise IndexError("row 7")
    text, err = jacobian_error(waves, XJ, broken)
    assert "jacobian function raised IndexError" in text and "row 7" in text
    assert isinstance(err.__cause__, IndexError)


def test_jacobian_fun_that_raises_at_the_base_point_is_chained():
    def broken(v):
        raise ZeroDivisionError("empty window")
    text, err = jacobian_error(broken, XJ, waves_jacobian)
    assert "ZeroDivisionError" in text and "base point" in text
    assert isinstance(err.__cause__, ZeroDivisionError)


def test_jacobian_fun_returning_none_is_refused():
    text, _ = jacobian_error(lambda v: None, XJ, np.zeros((1, 3)))
    assert "fun: returned" in text and "expected" in text


def test_jacobian_fun_returning_complex_numbers_is_refused():
    text, _ = jacobian_error(lambda v: v * 1j, XJ, np.zeros((3, 3)))
    assert "complex" in text


def test_jacobian_none_with_a_cost_autograd_cannot_trace_says_pass_jacobian():
    def plain(v):
        return np.array([float(np.sum(np.asarray(v, dtype=float) ** 2)), 1.0])
    text, _ = jacobian_error(plain, XJ)
    assert "autograd" in text and "jacobian=" in text


def test_jacobian_leaves_the_callers_params_alone():
    params = {"w": XJ.copy()}

    def editing(p):
        out = waves(p["w"])
        p["w"][:] = 0.0
        return out
    gk.compare_jacobian(editing, params, lambda p: waves_jacobian(XJ))
    assert np.array_equal(params["w"], XJ)


# --- namedtuples ----------------------------------------------------------------------------------
Fit = collections.namedtuple("Fit", ["slope", "offset"])
FIT = Fit(np.array([0.5, -1.0]), 0.25)


def fit_cost(q):
    return np.sum(q.slope ** 2) * q.offset + q.offset ** 3


def fit_gradient(q):
    return Fit(2 * q.slope * q.offset, np.sum(q.slope ** 2) + 3 * q.offset ** 2)


def test_namedtuple_params_are_checked_and_rebuilt_as_the_namedtuple():
    seen = []

    def cost(q):
        seen.append(type(q))
        return fit_cost(q)
    assert gk.compare_gradient(cost, FIT, fit_gradient).passed
    assert set(seen) == {Fit}                       # the cost gets its own type back
    g = gk.numeric_gradient(fit_cost, FIT)
    assert type(g) is Fit and isinstance(g.offset, float)
    np.testing.assert_allclose(g.slope, 2 * FIT.slope * FIT.offset, rtol=1e-8)


def test_a_namedtuple_gradient_with_a_wrong_field_is_found():
    def wrong(q):
        g = fit_gradient(q)
        return g._replace(offset=2 * g.offset)
    report = gk.compare_gradient(fit_cost, FIT, wrong)
    assert not report.passed and [r.flat_index for r in report.mismatches] == [2]


def test_namedtuple_coordinates_are_named_by_field():
    report = gk.compare_gradient(fit_cost, FIT, fit_gradient)
    assert [r.name for r in report.rows] == ["slope[0]", "slope[1]", "offset"]


def test_namedtuple_outputs_of_a_jacobian():
    Out = collections.namedtuple("Out", ["energy", "force"])

    def fun(q):
        return Out(q.offset * np.sum(q.slope), q.slope ** 2)

    def jac(q):                     # rows: energy, force[0], force[1]; columns: the params
        s = q.slope
        return np.array([[q.offset, q.offset, np.sum(s)],
                         [2 * s[0], 0.0, 0.0],
                         [0.0, 2 * s[1], 0.0]])
    assert gk.compare_jacobian(fun, FIT, jac).passed
    assert gk.compare_jacobian(fun, FIT).passed      # autograd through the namedtuple

    def wrong(q):
        j = jac(q)
        j[2, 1] *= -1
        return j
    report = gk.compare_jacobian(fun, FIT, wrong)
    assert not report.passed and len(report.mismatches) == 1
