"""compare_jacobian makes the base-point checks a gradient check makes.

Its output cache replays values, so a random vector function or one that edits
its input must be caught on the function itself, before outputs are compared.
The functions and data here are invented for these tests.
"""
import numpy as np
import pytest

import gradcheck_kit as gk

MIX = np.array([[1.0, 2.0, -0.5], [0.3, -1.0, 0.8]])
X = np.array([0.4, -0.2, 0.7])


def waves(v):
    return np.sin(MIX @ v)


def waves_jacobian(v):
    return np.cos(MIX @ v)[:, None] * MIX


def jittered_waves(v):
    """A vector function with an unseeded random factor, as dropout or sampling gives."""
    return np.sin(MIX @ v) * (1 + 0.01 * np.random.standard_normal())


@pytest.mark.parametrize("method", ["auto", "central", "richardson", "forward"])
@pytest.mark.parametrize("draw", range(5))
def test_random_function_with_a_jacobian_five_times_off_does_not_pass(method, draw):
    np.random.seed(draw)  # the function itself stays unseeded: each call draws anew
    report = gk.compare_jacobian(jittered_waves, X, lambda v: 5 * waves_jacobian(v),
                                 method=method)
    assert not report.passed
    assert any("not deterministic" in p for p in report.problems), report.problems


def test_random_function_fails_even_with_the_right_jacobian_and_says_why():
    report = gk.compare_jacobian(jittered_waves, X, waves_jacobian)
    assert not report.passed and report.rows == []
    (problem,) = report.problems
    assert problem.startswith("the function is not deterministic: two calls at the same "
                              "parameters returned different outputs")
    assert "seed its random generator" in problem
    assert "not deterministic" in report.to_text()
    assert report.evaluations == 2


@pytest.mark.parametrize("method", ["auto", "central", "richardson"])
def test_deterministic_right_jacobian_still_passes_at_the_same_cost(method):
    """The function runs once per distinct point, and once more at the base point for
    the determinism check: the cost of the per-output checks' own second base call,
    which the cache used to replay, so the total is what it was."""
    points = []

    def counted(v):
        v = np.asarray(v)
        points.append(v.dtype.str + v.tobytes().hex())
        return waves(v)
    report = gk.compare_jacobian(counted, X, waves_jacobian, method=method)
    assert report.passed and report.problems == []
    assert report.evaluations == len(points) == len(set(points)) + 1
    assert points.count(X.dtype.str + X.tobytes().hex()) == 2


def test_wrong_deterministic_jacobian_still_fails_on_its_rows():
    report = gk.compare_jacobian(waves, X, lambda v: 5 * waves_jacobian(v))
    assert not report.passed and report.problems == [] and report.mismatches


def test_tiny_rounding_differences_between_calls_are_not_randomness():
    """Two base calls may differ by a few epsilons (threaded sums): still deterministic."""
    calls = {"n": 0}

    def wobbly(v):
        calls["n"] += 1
        y = np.sin(MIX @ v)
        return y * (1 + 2 * np.finfo(float).eps) if calls["n"] == 2 else y
    assert gk.compare_jacobian(wobbly, X, waves_jacobian).passed


def test_function_returning_a_different_number_of_outputs_is_not_deterministic():
    calls = {"n": 0}

    def growing(v):
        calls["n"] += 1
        return np.sin(MIX @ v) if calls["n"] == 1 else np.sin(np.concatenate([MIX @ v, v]))
    report = gk.compare_jacobian(growing, X, waves_jacobian)
    assert not report.passed and "returned 2 and 5 outputs" in report.problems[0]


def test_input_editing_function_gets_copies_and_one_note():
    def scaling(p):
        y = np.sin(MIX @ p["w"])
        p["w"] *= 2  # edits its input in place
        return y
    params = {"w": X.copy()}
    report = gk.compare_jacobian(scaling, params, waves_jacobian(X))
    assert report.passed
    np.testing.assert_array_equal(params["w"], X)  # the caller's array is untouched
    edits = [t for t in report.notes if "modifies its input in place" in t]
    assert edits == [t for t in report.notes if t.startswith("the function modifies its input")]
    assert len(edits) == 1 and "changed w" in edits[0]


def test_deterministic_function_gets_no_edit_note():
    assert not any("in place" in t for t in gk.compare_jacobian(waves, X, waves_jacobian).notes)


@pytest.mark.parametrize("options, named", [
    ({"methd": "central"}, "unknown option 'methd'"),
    ({"method": "fast"}, "method: expected one of"),
    ({"rtol": -1.0}, "rtol: expected a finite number >= 0"),
])
def test_bad_options_are_refused_before_the_function_runs(options, named):
    calls = []

    def counted(v):
        calls.append(1)
        return waves(v)
    with pytest.raises(gk.CheckInputError, match=named):
        gk.compare_jacobian(counted, X, waves_jacobian, **options)
    assert calls == []


def test_output_that_is_not_numbers_is_refused_clearly():
    with pytest.raises(gk.CheckInputError, match="fun: returned"):
        gk.compare_jacobian(lambda v: np.array(["a", "b"]), X, np.zeros((2, 3)))


def test_non_finite_output_at_the_base_point_is_named():
    def partly_undefined(v):
        return np.array([np.sin(v[0]), np.log(v[1])])  # log of a negative number
    with np.errstate(invalid="ignore"):
        with pytest.raises(gk.CheckInputError, match=r"non-finite outputs .*y\[1\] = nan"):
            gk.compare_jacobian(partly_undefined, X, np.zeros((2, 3)))
