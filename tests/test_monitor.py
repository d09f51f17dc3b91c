"""The gradient monitor: rows per checked step, no false alarms along real runs, the first
wrong step of a region-dependent bug, saved points that re-check the same way, and an
optimizer whose state and random streams the monitor never touches.

Sources: More, Garbow & Hillstrom, ACM TOMS 7(1), 1981 (mgh_problems.py, from memory) with
sympy's exact gradients; the ML losses of ml_losses.py (common practice); the safe-log
continuation below is common practice.  Every run is seeded, so nothing here can flake.
"""
import copy
import importlib.util
import json
import random

import numpy as np
import pytest
import scipy.optimize

import gradcheck_kit as gk
from gradcheck_kit.cases import check_case, declared_cases
from mgh_problems import BY_NAME, float_gradient
from ml_losses import FACTORIES

# --- a cost whose hand-written gradient is wrong only for x < FLOOR --------------------
FLOOR = 1e-3
_rng = np.random.default_rng(7)
A = _rng.normal(size=(40, 6))
_target = np.abs(_rng.normal(size=6)) + 0.2
_target[0] = -0.3            # the fit pulls x[0] through FLOOR
B = A @ _target
PULL = 1e-3


def safe_log(x):
    """log(x) continued below FLOOR by its tangent (common practice)."""
    return np.where(x >= FLOOR, np.log(np.maximum(x, FLOOR)), np.log(FLOOR) + (x - FLOOR) / FLOOR)


def fit_cost(x):
    r = A @ x - B
    return 0.5 * r @ r / len(B) - PULL * np.sum(safe_log(x))


def fit_gradient(x):
    slope = np.where(x >= FLOOR, 1 / np.maximum(x, FLOOR), 1 / FLOOR)
    return A.T @ (A @ x - B) / len(B) - PULL * slope


def fit_gradient_with_bug(x):
    return A.T @ (A @ x - B) / len(B) - PULL / x     # forgets the branch below FLOOR


def descend(grad, steps, monitor=None, rate=0.05):
    x = np.full(6, 0.5)
    path = []
    for step in range(steps):
        g = grad(x)
        path.append(x.copy())
        if monitor is not None:
            monitor.observe(x, g, step=step)
        x = x - rate * g
    return path


def test_the_first_wrong_step_is_the_first_checked_step_past_the_switch():
    path = descend(fit_gradient_with_bug, 300)
    switch = next(k for k, x in enumerate(path) if x.min() < FLOOR)
    monitor = gk.GradientMonitor(fit_cost, every=7, seed=3)
    descend(fit_gradient_with_bug, 300, monitor)
    report = monitor.report()
    first_checked_after = min(s for s in report.checked_steps if s >= switch)
    assert report.first_wrong_step == first_checked_after
    assert report.last_right_step == max(s for s in report.checked_steps if s < switch)
    assert not report.passed
    assert f"the gradient went wrong at step {first_checked_after}" in str(report)
    # every checked step before the switch agrees; the rows are one per checked step
    assert [r.step for r in report.rows] == report.checked_steps
    assert all(not r.failing for r in report.rows if r.step < switch)
    np.testing.assert_array_equal(report.saved.params, path[report.first_wrong_step])
    # the per-coordinate check ran there and names x[0]
    assert [r.name for r in report.coordinate_report.mismatches] == ["x[0]"]


def test_the_same_run_with_the_right_gradient_never_fails():
    monitor = gk.GradientMonitor(fit_cost, every=3, seed=3)
    descend(fit_gradient, 300, monitor)
    report = monitor.report()
    assert report.passed and report.first_wrong_step is None and report.saved is None
    assert len(report.rows) == 100 and report.counts.get("agree", 0) >= 90


def test_saved_point_rechecks_to_the_same_verdict(tmp_path):
    monitor = gk.GradientMonitor(fit_cost, every=5, seed=11)
    descend(fit_gradient_with_bug, 300, monitor)
    report = monitor.report()
    saved = report.saved
    row = next(r for r in report.rows if r.step == report.first_wrong_step)
    again = saved.recheck()
    assert (again.verdict, again.analytic, again.numeric) == (row.verdict, row.analytic,
                                                              row.numeric)
    assert not saved.compare().passed

    # the written module declares a case that fails at the point, with the values observed
    path = saved.write_case(tmp_path / "case_at_switch.py")
    spec = importlib.util.spec_from_file_location("case_at_switch", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    [(_, case)] = declared_cases(vars(module))
    result = check_case(case)
    assert not result.passed and [r.name for r in result.report.mismatches] == ["x[0]"]
    np.testing.assert_array_equal(module.PARAMS, saved.params)   # exact values, not rounded

    # naming the fixed gradient function instead: the same point now passes
    fixed = saved.write_case(tmp_path / "case_fixed.py", gradient="test_monitor:fit_gradient")
    spec = importlib.util.spec_from_file_location("case_fixed", fixed)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    [(_, case)] = declared_cases(vars(module))
    assert check_case(case).passed

    npz = saved.write_npz(tmp_path / "point.npz")
    np.testing.assert_array_equal(np.load(npz)["x"], saved.params)


def test_write_case_explains_a_cost_it_cannot_import(tmp_path):
    monitor = gk.GradientMonitor(lambda x: fit_cost(x), every=5, seed=0)
    descend(fit_gradient_with_bug, 300, monitor)
    with pytest.raises(gk.CheckInputError, match="cannot be imported by name.*cost="):
        monitor.report().saved.write_case(tmp_path / "c.py")


class Momentum:
    """A small optimizer with state: velocity buffers and its own random stream (noise)."""

    def __init__(self, params, seed):
        self.velocity = {k: np.zeros_like(v) for k, v in params.items()}
        self.rng = np.random.default_rng(seed)
        self.steps = 0

    def update(self, params, g):
        self.steps += 1
        out = {}
        for k in params:
            self.velocity[k] = 0.9 * self.velocity[k] - 0.05 * g[k]
            out[k] = params[k] + self.velocity[k] + 1e-6 * self.rng.standard_normal(
                params[k].shape)
        return out


def tree_cost(p):
    np.random.standard_normal()          # draws from the global stream, returns no noise
    random.random()
    p["w"] *= 1.0                        # edits its input in place (a copy, we hope)
    return float(np.sum(np.tanh(p["w"]) ** 2) + 0.5 * np.sum(p["b"] ** 2))


def tree_gradient(p):
    t = np.tanh(p["w"])
    return {"w": 2 * t * (1 - t ** 2), "b": p["b"].copy()}


def test_observe_leaves_the_optimizer_and_its_random_streams_alone():
    params = {"w": np.array([[0.3, -0.8], [1.1, 0.2]]), "b": np.array([0.5, -0.1])}
    opt = Momentum(params, seed=5)
    monitor = gk.GradientMonitor(tree_cost, every=1, seed=0)
    np.random.seed(123)
    random.seed(321)
    for step in range(6):
        g = tree_gradient(params)
        snapshot = copy.deepcopy((params, g, opt.velocity, opt.rng.bit_generator.state,
                                  opt.steps))
        global_np, global_py = copy.deepcopy(np.random.get_state()), random.getstate()
        monitor.observe(params, g, step=step)
        after = (params, g, opt.velocity, opt.rng.bit_generator.state, opt.steps)
        for before_leaf, after_leaf in zip(_leaves(snapshot), _leaves(after)):
            np.testing.assert_array_equal(before_leaf, after_leaf)
        assert random.getstate() == global_py
        state = np.random.get_state()
        assert state[0] == global_np[0] and np.array_equal(state[1], global_np[1]) and \
            state[2:] == global_np[2:]
        params = opt.update(params, g)
    assert monitor.report().passed and len(monitor.report().rows) == 6


def _leaves(tree):
    if isinstance(tree, dict):
        return [x for k in sorted(tree) for x in _leaves(tree[k])]
    if isinstance(tree, (list, tuple)):
        return [x for v in tree for x in _leaves(v)]
    return [np.asarray(tree, dtype=object) if isinstance(tree, str) else tree]


def test_a_kept_point_is_a_copy():
    monitor = gk.GradientMonitor(fit_cost, every=1, seed=0)
    x = np.full(6, 0.5)
    g = fit_gradient_with_bug(x) + 1.0       # wrong everywhere
    monitor.observe(x, g, step=0)
    kept = monitor.report().saved.params.copy()
    x[:] = 99.0
    np.testing.assert_array_equal(monitor.report().saved.params, kept)


@pytest.mark.parametrize("name", ["rosenbrock", "beale", "wood", "helical_valley",
                                  "kowalik_osborne"])
def test_no_false_alarm_along_gradient_descent_on_mgh(name):
    p = BY_NAME[name]
    grad = float_gradient(name)
    monitor = gk.GradientMonitor(p.cost, every=4, seed=1)
    x = np.array(p.x0, dtype=float)
    f = p.cost(x)
    for step in range(80):
        g = grad(x)
        monitor.observe(x, g, step=step)
        t = 1.0
        while p.cost(x - t * g) > f - 1e-4 * t * (g @ g) and t > 1e-12:   # Armijo backtracking
            t /= 2
        x = x - t * g
        f = p.cost(x)
    report = monitor.report()
    assert report.passed, report.to_text()
    assert len(report.rows) == 20


@pytest.mark.parametrize("name", ["rosenbrock", "freudenstein_roth", "box_3d", "biggs_exp6"])
def test_no_false_alarm_along_scipy_lbfgsb_on_mgh(name):
    p = BY_NAME[name]
    grad = float_gradient(name)
    monitor = gk.GradientMonitor(p.cost, grad, every=1, seed=2)
    scipy.optimize.minimize(p.cost, np.array(p.x0, dtype=float), jac=grad, method="L-BFGS-B",
                            callback=monitor.callback, options={"maxiter": 40})
    report = monitor.report()
    assert report.passed, report.to_text()
    assert report.checked_steps[0] == 1 and len(report.rows) >= 5
    assert report.gradient_calls == len(report.rows)    # the gradient came from `grad`


@pytest.mark.parametrize("factory", FACTORIES, ids=lambda f: f.__name__)
def test_no_false_alarm_along_gradient_descent_on_ml_losses(factory):
    case = factory(np.random.default_rng(4))
    monitor = gk.GradientMonitor(case.cost, every=2, seed=4)
    params = case.params
    for step in range(30):
        g = case.gradient(params)
        monitor.observe(params, g, step=step)
        params = _step(params, g, 0.05)
    report = monitor.report()
    assert report.passed, report.to_text()


def _step(p, g, rate):
    if isinstance(p, dict):
        return {k: _step(p[k], g[k], rate) for k in p}
    return p - rate * np.asarray(g) if isinstance(p, np.ndarray) else float(p - rate * g)


def test_gradient_none_uses_autograd_and_observe_without_g():
    import autograd.numpy as anp

    monitor = gk.GradientMonitor(lambda x: anp.sum(anp.sin(x) ** 2), seed=0, every=2)
    x = np.array([0.4, -1.0, 2.0])
    for step in range(6):
        monitor.observe(x, step=step)
        x = x - 0.1 * np.sin(2 * x)
    report = monitor.report()
    assert report.checked_steps == [0, 2, 4] and report.passed and report.gradient_calls == 3


def test_budget_schedule_checks_the_first_step_and_fewer_later():
    monitor = gk.GradientMonitor(fit_cost, seed=0)
    descend(fit_gradient, 200, monitor)
    report = monitor.report()
    assert report.checked_steps[0] == 0 and len(report.rows) < 200
    assert report.every is None and "spread by the budget" in str(report)


def test_report_text_json_and_counts():
    monitor = gk.GradientMonitor(fit_cost, every=10, seed=3)
    descend(fit_gradient_with_bug, 300, monitor)
    report = monitor.report()
    text = report.to_text()
    assert text.startswith("FAIL gradient monitor") and "disagree" in text
    assert "saved: the parameters at step" in text and "per-coordinate check" in text
    data = json.loads(json.dumps(report.to_dict()))
    assert data["first_wrong_step"] == report.first_wrong_step
    assert len(data["rows"]) == len(report.rows) == 30
    assert sum(report.counts.values()) == 30


def test_plot_writes_a_png_without_touching_the_backend(tmp_path):
    matplotlib = pytest.importorskip("matplotlib")
    backend = matplotlib.get_backend()
    monitor = gk.GradientMonitor(fit_cost, every=10, seed=3)
    descend(fit_gradient_with_bug, 300, monitor)
    fig = monitor.report().plot(tmp_path / "errors.png")
    assert (tmp_path / "errors.png").read_bytes()[:4] == b"\x89PNG"
    assert matplotlib.get_backend() == backend
    from matplotlib.figure import Figure
    assert isinstance(fig, Figure)


@pytest.mark.parametrize("kwargs, message", [
    ({"every": 0}, "every: expected None or an int >= 1"),
    ({"budget": -0.1}, "budget: expected a number > 0"),
    ({"seed": -2}, "seed: expected None or an int >= 0"),
    ({"directions": 0}, "directions: expected an int >= 1"),
    ({"gradient": np.zeros(6)}, "gradient: expected a function of params or None"),
])
def test_bad_options_are_named(kwargs, message):
    with pytest.raises(gk.CheckInputError, match=message):
        gk.GradientMonitor(fit_cost, **kwargs)


def test_bad_observations_are_named():
    monitor = gk.GradientMonitor(fit_cost, every=1, seed=0)
    x = np.full(6, 0.5)
    with pytest.raises(gk.CheckInputError, match=r"g for parameter 'x': expected shape \(6,\)"):
        monitor.observe(x, np.zeros(5), step=0)
    monitor.observe(x, fit_gradient(x), step=1)
    with pytest.raises(gk.CheckInputError, match=r"step: expected a step after .*\(1\), got 1"):
        monitor.observe(x, fit_gradient(x), step=1)
    vector = gk.GradientMonitor(lambda x: x ** 2, every=1, seed=0)
    with pytest.raises(gk.CheckInputError, match="cost: expected a scalar"):
        vector.observe(x, 2 * x, step=0)


def test_non_finite_gradient_is_a_wrong_step():
    monitor = gk.GradientMonitor(fit_cost, every=1, seed=0)
    x = np.full(6, 0.5)
    monitor.observe(x, fit_gradient(x), step=0)
    g = fit_gradient(x)
    g[2] = np.nan
    row = monitor.observe(x, g, step=1)
    assert row.verdict == "non-finite" and "x[2]" in row.detail
    assert monitor.report().first_wrong_step == 1
