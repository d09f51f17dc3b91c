"""GradientMonitor: bad input, failing costs, written cases and the report's text.

Costs are sums of squares and of sines (their gradients are common practice); the tests
read what a user sees: messages, verdicts, the report's lines and the written files.
"""
import importlib.util
import sys
import types

import numpy as np
import pytest

import autograd.numpy as anp
from autograd.extend import defvjp, primitive

import gradcheck_kit as gk
from gradcheck_kit.cases import check_case, declared_cases


def squares(x):
    return np.sum(x ** 2)


def squares_gradient(x):
    return 2 * x


def tree_cost(p):
    """A cost on a nest holding a list, a tuple, a Python float and a 0-d array."""
    return (np.sum(p["layers"][0] ** 2) + p["layers"][1] ** 2 + np.sum(p["pair"][0] ** 2)
            + p["gain"] ** 2 + p["offset"] ** 2)


def _load(path, name):
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _failing_monitor(cost=squares, x=None, **options):
    """A monitor whose first observed step has a gradient off by a factor 2."""
    x = np.array([0.5, -1.5, 2.0]) if x is None else x
    monitor = gk.GradientMonitor(cost, every=1, seed=1, **options)
    monitor.observe(x, 4 * x, step=0)
    return monitor


def test_a_cost_that_is_not_callable_is_named():
    with pytest.raises(gk.CheckInputError, match="cost: expected a callable taking params, got "
                                                 "ndarray"):
        gk.GradientMonitor(np.zeros(3))


def test_steps_count_on_by_themselves_and_must_be_ints():
    monitor = gk.GradientMonitor(squares, every=2, seed=0)
    x = np.array([1.0, 2.0])
    for _ in range(5):
        monitor.observe(x, 2 * x)
    assert monitor.report().checked_steps == [0, 2, 4]
    assert monitor.report().steps_seen == 5
    with pytest.raises(gk.CheckInputError, match=r"step: expected an int or None, got 5\.5"):
        monitor.observe(x, 2 * x, step=5.5)
    with pytest.raises(gk.CheckInputError, match="step: expected an int or None, got True"):
        monitor.observe(x, 2 * x, step=True)


def test_a_gradient_function_that_raises_is_reported_with_the_step():
    def gradient(x):
        raise ZeroDivisionError("no slope here")

    monitor = gk.GradientMonitor(squares, gradient, every=1, seed=0)
    with pytest.raises(gk.CheckInputError,
                       match="gradient raised ZeroDivisionError at step 3: no slope here"):
        monitor.observe(np.array([1.0, 2.0]), step=3)


def test_a_cost_autograd_cannot_trace_gets_a_way_out():
    monitor = gk.GradientMonitor(lambda x: float(x[0]) ** 2, every=1, seed=0)
    with pytest.raises(gk.CheckInputError, match="gradient=None: autograd could not "
                                                 "differentiate the cost .*pass gradient= or g"):
        monitor.observe(np.array([1.0, 2.0]), step=0)


def test_a_cost_that_raises_is_an_error_step_and_the_coordinate_check_says_why():
    def broken(x):
        raise ValueError("the table is missing")

    monitor = gk.GradientMonitor(broken, every=1, seed=0)
    row = monitor.observe(np.array([1.0, 2.0]), np.array([1.0, 1.0]), step=0)
    assert row.verdict == "error" and row.failing
    assert row.detail == "the cost raised ValueError at the point: the table is missing"
    report = monitor.report()
    assert not report.passed and report.first_wrong_step == 0
    assert report.coordinate_report is None
    assert any(n.startswith("the per-coordinate check at step 0 could not run") for n in
               report.notes)
    assert "  note: the per-coordinate check at step 0 could not run" in report.to_text()


def test_a_cost_that_is_infinite_at_the_point_is_a_non_finite_step():
    row = gk.GradientMonitor(lambda x: np.inf, every=1, seed=0,
                             name_coordinates=False).observe(np.ones(2), np.ones(2), step=0)
    assert row.verdict == "non-finite" and row.detail == "the cost is inf at this point"


def test_a_complex_cost_is_refused_with_its_dtype():
    monitor = gk.GradientMonitor(lambda x: np.sum(x ** 2) + 0j, every=1, seed=0)
    with pytest.raises(gk.CheckInputError, match="cost: expected a real number, got complex128"):
        monitor.observe(np.ones(2), 2 * np.ones(2), step=0)


def test_float32_params_with_the_right_gradient_agree():
    # The points x + t v are rounded to float32: the check allows for that rounding.
    x = np.array([0.3, -1.7, 2.5, 0.01], dtype=np.float32)
    monitor = gk.GradientMonitor(lambda p: np.sum(np.sin(p)), every=1, seed=4)
    row = monitor.observe(x, np.cos(x), step=0)
    assert row.verdict == "agree"
    assert monitor.observe(x, 1.5 * np.cos(x), step=1).verdict == "disagree"


def test_many_coordinates_are_searched_by_group_testing():
    n = 600                     # above the monitor's full-check limit of 500 coordinates
    x = np.linspace(-1.0, 1.0, n)
    g = 2 * x
    g[417] += 1.0               # one wrong entry
    monitor = gk.GradientMonitor(squares, every=1, seed=2)
    monitor.observe(x, g, step=0)
    report = monitor.report()
    assert not report.passed
    assert [r.name for r in report.coordinate_report.mismatches] == ["x[417]"]


def test_write_case_refuses_a_path_that_is_not_python_and_a_bad_name(tmp_path):
    saved = _failing_monitor(name_coordinates=False).report().saved
    with pytest.raises(gk.CheckInputError, match="path: expected a .py file for the case module, "
                                                 "got case.txt"):
        saved.write_case(tmp_path / "case.txt")
    with pytest.raises(gk.CheckInputError, match="name: expected a Python identifier, got "
                                                 "'at step'"):
        saved.write_case(tmp_path / "case.py", name="at step")
    with pytest.raises(gk.CheckInputError, match="cost: expected 'package.module:name' or "
                                                 "'path/file.py:name', got 'squares'"):
        saved.write_case(tmp_path / "case.py", cost="squares")


def test_write_case_of_a_nested_point_rebuilds_it_exactly(tmp_path):
    params = {"layers": [np.array([0.1, 1 / 3]), 0.7], "pair": (np.array([[2.0, -1e-300]]),),
              "gain": np.float64(1.25), "offset": np.array(-0.5)}
    monitor = gk.GradientMonitor(tree_cost, every=1, seed=5, name_coordinates=False)
    wrong = {"layers": [np.array([0.2, 2 / 3]), 1.4], "pair": (np.array([[4.0, 0.0]]),),
             "gain": 2.5, "offset": np.array(1.0)}     # d offset^2 = -1, not 1
    monitor.observe(params, wrong, step=0)
    saved = monitor.report().saved
    path = saved.write_case(tmp_path / "nested_case.py", cost="test_cov_monitor:tree_cost")
    module = _load(path, "nested_case")
    rebuilt = module.PARAMS
    assert isinstance(rebuilt["layers"], list) and isinstance(rebuilt["pair"], tuple)
    assert rebuilt["layers"][1] == 0.7 and isinstance(rebuilt["layers"][1], float)
    np.testing.assert_array_equal(rebuilt["layers"][0], params["layers"][0])
    np.testing.assert_array_equal(rebuilt["pair"][0], params["pair"][0])
    assert rebuilt["pair"][0][0, 1] == -1e-300
    assert float(rebuilt["gain"]) == 1.25 and np.asarray(rebuilt["offset"]).shape == ()
    [(_, case)] = declared_cases(vars(module))
    result = check_case(case)
    assert not result.passed
    assert [r.name for r in result.report.mismatches] == ["offset"]


def test_write_case_names_the_gradient_function_it_was_given(tmp_path):
    def off_by_two(x):
        return 4 * x

    monitor = gk.GradientMonitor(squares, off_by_two, every=1, seed=0, name_coordinates=False)
    monitor.observe(np.array([0.5, 2.0]), step=0)
    saved = monitor.report().saved
    assert saved.from_function
    path = saved.write_case(tmp_path / "c.py", gradient="test_cov_monitor:squares_gradient")
    text = path.read_text()
    assert "from test_cov_monitor import squares_gradient as _gradient" in text
    assert "gradient=_gradient" in text
    [(_, case)] = declared_cases(vars(_load(path, "named_gradient_case")))
    assert check_case(case).passed      # the named function is the right one


@primitive
def soft_plus(x):
    return np.log1p(np.exp(x))


# a custom derivative rule with a bug: the sigmoid's argument has the wrong sign
defvjp(soft_plus, lambda ans, x: lambda g: g / (1 + np.exp(x)))


def soft_plus_cost(x):
    return anp.sum(soft_plus(x))


def test_write_case_of_a_wrong_autograd_rule_checks_autograd_again(tmp_path):
    monitor = gk.GradientMonitor(soft_plus_cost, every=1, seed=0, name_coordinates=False)
    row = monitor.observe(np.array([0.5, 1.5]), step=0)
    assert row.verdict == "disagree"
    saved = monitor.report().saved
    assert saved.from_function
    path = saved.write_case(tmp_path / "rule_case.py")
    assert "@gk.case(gradient=None," in path.read_text()
    [(_, case)] = declared_cases(vars(_load(path, "rule_case")))
    assert not check_case(case).passed      # autograd's rule is still the wrong one


def test_write_case_of_a_cost_from_a_script_imports_the_script_file(tmp_path, monkeypatch):
    script = tmp_path / "fit_script.py"
    script.write_text("import numpy as np\n\n\ndef fit(x):\n    return np.sum(x ** 2)\n\n\n"
                      "if __name__ == '__main__':\n    raise SystemExit('not when imported')\n")
    module = _load(script, "fit_script")
    monkeypatch.setitem(sys.modules, "__main__", module)
    monkeypatch.setattr(module.fit, "__module__", "__main__")
    monitor = _failing_monitor(cost=module.fit, name_coordinates=False)
    path = monitor.report().saved.write_case(tmp_path / "from_script.py")
    assert "spec_from_file_location" in path.read_text()
    [(_, case)] = declared_cases(vars(_load(path, "from_script")))
    assert not check_case(case).passed        # the observed g was 4x, not 2x


def test_write_case_of_an_interactive_cost_asks_for_a_name(tmp_path, monkeypatch):
    def fit(x):
        return np.sum(x ** 2)

    fit.__qualname__ = "fit"
    fit.__module__ = "__main__"
    monkeypatch.setitem(sys.modules, "__main__", types.ModuleType("__main__"))
    saved = _failing_monitor(cost=fit, name_coordinates=False).report().saved
    with pytest.raises(gk.CheckInputError, match="the cost was defined interactively; pass "
                                                 "cost='package.module:name'"):
        saved.write_case(tmp_path / "c.py")


def test_write_case_of_a_large_point_puts_the_values_in_an_npz(tmp_path):
    x = np.linspace(0.5, 1.5, 20001)    # one above the inline limit of 20000 numbers
    monitor = gk.GradientMonitor(squares, every=1, seed=0, name_coordinates=False)
    monitor.observe(x, 4 * x, step=0)
    saved = monitor.report().saved
    path = saved.write_case(tmp_path / "big_case.py", cost="test_cov_monitor:squares")
    assert (tmp_path / "big_case.npz").exists()
    assert len(path.read_text()) < 5000          # the values are not inline
    module = _load(path, "big_case")
    np.testing.assert_array_equal(module.PARAMS, x)
    np.testing.assert_array_equal(module.GRADIENT, 4 * x)


def test_report_text_before_any_check_and_of_a_long_passing_run():
    monitor = gk.GradientMonitor(squares, every=1, seed=0)
    empty = monitor.report()
    assert empty.passed and empty.overhead is None
    assert empty.to_text() == empty.summary_line()
    assert "nothing checked yet" in empty.to_text() and "% of the run's time" not in \
        empty.to_text()
    x = np.array([1.0, -2.0])
    for step in range(20):
        monitor.observe(x, 2 * x, step=step)
        x = 0.9 * x
    text = monitor.report().to_text()
    lines = text.splitlines()
    assert lines[0].startswith("PASS gradient monitor: no checked step fails (20 agree)")
    assert "% of the run's time (budget 5%)" in lines[0]
    # 12 rows at most: the first three, an ellipsis, the last three
    assert [s.split()[0] for s in lines[2:]] == ["0", "1", "2", "...", "17", "18", "19"]


def test_plot_of_nothing_and_of_a_passing_run(tmp_path):
    pytest.importorskip("matplotlib")
    monitor = gk.GradientMonitor(squares, every=1, seed=0)
    with pytest.raises(gk.CheckInputError, match="plot: no step has been checked yet"):
        monitor.report().plot()
    monitor.observe(np.array([1.0, 2.0]), np.array([2.0, 4.0]), step=0)
    fig = monitor.report().plot()
    assert not list(tmp_path.iterdir())           # no path: nothing written
    ax = fig.axes[0]
    assert ax.get_xlabel() == "optimizer step"
    assert not [line for line in ax.get_lines() if "first wrong step" in line.get_label()]


def test_plot_without_matplotlib_says_how_to_install_it(monkeypatch):
    monitor = gk.GradientMonitor(squares, every=1, seed=0)
    monitor.observe(np.array([1.0, 2.0]), np.array([2.0, 4.0]), step=0)
    monkeypatch.setitem(sys.modules, "matplotlib.backends.backend_agg", None)
    with pytest.raises(gk.CheckInputError, match=r"pip install 'gradcheck_kit\[plot\]'"):
        monitor.report().plot()


def test_a_cost_drawing_from_torch_leaves_torch_s_stream_alone():
    torch = pytest.importorskip("torch")

    def jittery(x):
        torch.rand(3)            # a cost that draws from torch's global stream
        return np.sum(x ** 2)

    torch.manual_seed(123)
    expected = torch.rand(4)
    torch.manual_seed(123)
    monitor = gk.GradientMonitor(jittery, every=1, seed=0)
    monitor.observe(np.array([1.0, 2.0]), np.array([2.0, 4.0]), step=0)
    assert torch.equal(torch.rand(4), expected)
