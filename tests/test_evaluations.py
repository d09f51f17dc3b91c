"""Evaluations are counted honestly: the report's count is the number of cost calls,
and each method spends what it promises (n, 2n, 4n) plus a small constant of probes:
the base point twice (a random cost is caught by the repeat), 8 points on each of the
three noise lines, and 6 for the complex-safety probe (auto, and a requested complex step),
6 more where its complex and real slopes disagree (the real ones at a shorter step)."""
import numpy as np
import pytest

import gradcheck_kit as gk

PROBES = 2 + 3 * 8      # base point twice, three noise lines
AUTO_PROBE = 6          # two complex points, four real ones


class Counted:
    def __init__(self, f):
        self.f, self.calls = f, 0

    def __call__(self, p):
        self.calls += 1
        return self.f(p)


def smooth(x):
    return np.sum(np.cos(x) + 0.5 * x ** 2)


def smooth_real_only(x):
    return float(np.sum(np.cos(np.real(x)) + 0.5 * np.real(x) ** 2))


def grad(x):
    return -np.sin(x) + x


X = np.linspace(-1.0, 1.0, 12)


@pytest.mark.parametrize("method, per_coordinate", [
    ("complex-step", 1), ("central", 2), ("forward", 1), ("five-point", 4), ("richardson", 4)])
def test_each_method_spends_what_it_promises(method, per_coordinate):
    cost = Counted(smooth)
    report = gk.compare_gradient(cost, X, grad, method=method)
    assert report.passed
    probe = AUTO_PROBE if method == "complex-step" else 0
    assert report.evaluations == cost.calls == per_coordinate * X.size + PROBES + probe


def test_auto_on_a_complex_safe_cost_spends_n_plus_probes():
    cost = Counted(smooth)
    report = gk.compare_gradient(cost, X, grad)
    assert report.method == "complex-step"
    assert report.evaluations == cost.calls == X.size + PROBES + AUTO_PROBE


def test_auto_on_a_real_only_cost_spends_4n_plus_probes():
    """Here the probe stops after its complex points, whose values came back real."""
    cost = Counted(smooth_real_only)
    report = gk.compare_gradient(cost, X, grad)
    assert report.method == "richardson" and report.passed, report.to_text()
    assert report.evaluations == cost.calls == 4 * X.size + PROBES + 2


def test_auto_on_a_cost_using_abs_spends_the_whole_probe():
    cost = Counted(lambda x: np.sum(np.abs(x - 3.0)) + np.sum(x ** 2))
    report = gk.compare_gradient(cost, X, lambda x: np.sign(x - 3.0) + 2 * x)
    assert report.method == "richardson" and report.passed, report.to_text()
    # abs() drops the imaginary part: the slopes disagree at the shorter step as much.
    assert report.evaluations == cost.calls == 4 * X.size + PROBES + 2 * AUTO_PROBE
    assert any("richardson" in note for note in report.notes)


def test_sampled_coordinates_spend_only_on_those():
    """Per-coordinate stencils only for the sampled coordinates (two central points each);
    whatever else a sampled check spends (probes along random directions, which move every
    coordinate) is counted too."""
    points = []

    def recording(x):
        points.append(np.array(x, copy=True))
        return smooth(x)
    cost = Counted(recording)
    report = gk.compare_gradient(cost, X, grad, method="central", coordinates={"x": [0, 5]})
    assert sorted(r.name for r in report.rows) == ["x[0]", "x[5]"]
    assert report.evaluations == cost.calls == len(points)
    single = [np.flatnonzero(p != X) for p in points]
    single = sorted(int(m[0]) for m in single if m.size == 1)
    assert single == [0, 0, 5, 5]
    assert sum(np.array_equal(p, X) for p in points) == 2     # the base point twice
