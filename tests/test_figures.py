"""Figures render to a temporary folder; checked by size, axes, labels and the data drawn."""
import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.figures import _grid

matplotlib = pytest.importorskip("matplotlib")
image = pytest.importorskip("matplotlib.image")

RNG = np.random.default_rng(1)
X = RNG.normal(size=(20, 4))
Y = RNG.normal(size=(20, 4))


def cost(p):
    return 0.5 * np.mean(np.sum((X @ p["W"] - Y) ** 2, axis=1)) + np.sum(np.cos(p["b"]))


def transposed(p):
    return {"W": (X.T @ (X @ p["W"] - Y) / 20).T, "b": -np.sin(p["b"])}


P = {"W": RNG.normal(size=(4, 4)), "b": np.array([0.3, 1.2, -0.4])}


def test_error_map_of_a_transposed_gradient_shows_the_pattern(tmp_path):
    report = gk.compare_gradient(cost, P, transposed)
    values, verdict = _grid([r for r in report.rows if r.parameter == "W"], (4, 4))
    off = ~np.eye(4, dtype=bool)
    assert np.all(verdict[off] == "disagree") and np.all(verdict[~off] == "agree")
    assert values[off].min() > -3 > values[~off].max()   # dark off the diagonal, light on it
    fig = report.plot(tmp_path / "map.png")
    titles = [ax.get_title() for ax in fig.axes]
    assert any(t.startswith("W: relative error") for t in titles)
    assert any(t.startswith("b: relative error") for t in titles)
    labels = {ax.get_ylabel() for ax in fig.axes}
    assert "log10 relative error" in labels          # the colour bars say what grey means
    height, width = image.imread(tmp_path / "map.png").shape[:2]
    assert width >= 800 and height >= 600


def test_step_sweep_shows_the_v_of_truncation_against_rounding():
    report = gk.compare_gradient(lambda x: np.sum(np.exp(np.sin(x))), np.array([0.7, -0.2]),
                                 lambda x: np.cos(x) * np.exp(np.sin(x)))
    sweep = report.source.step_sweep(0)
    err = np.abs(sweep["derivatives"] - report.rows[0].numeric)
    best = int(np.argmin(err))
    assert 3 < best < len(err) - 3                      # the minimum is inside the range
    assert err[0] > 1e3 * err[best] and err[-1] > 1e3 * err[best]   # both arms rise
    # the automatic central step sits near the bottom of the V
    h_best = sweep["steps"][best]
    assert 1e-2 < sweep["chosen_step"] / h_best < 1e2


def test_report_figure_has_sweep_and_taylor_panels(tmp_path):
    report = gk.compare_gradient(cost, P, transposed)
    fig = report.plot(tmp_path / "all.png")
    axes = {ax.get_title(): ax for ax in fig.axes}
    sweep = next(ax for t, ax in axes.items() if t.startswith("central difference error"))
    assert sweep.get_xscale() == "log" and sweep.get_yscale() == "log"
    assert sweep.get_xlabel() == "step h"
    taylor = next(ax for t, ax in axes.items() if t.startswith("Taylor remainder"))
    assert taylor.get_xlabel() == "step h along v" and taylor.get_legend() is not None


def test_taylor_figure_alone(tmp_path):
    result = gk.remainder_order(lambda x: np.sum(np.sin(x) ** 2), np.array([0.3, 0.9]),
                            lambda x: np.sin(2 * x))
    fig = result.plot(tmp_path / "taylor.png")
    assert (tmp_path / "taylor.png").stat().st_size > 5_000
    assert fig.axes[0].get_yscale() == "log"


def test_jacobian_figure_maps_outputs_against_inputs(tmp_path):
    import autograd.numpy as anp

    A = np.array([[1.0, 2.0, 0.5], [0.3, 1.0, 3.0]])
    report = gk.compare_jacobian(lambda x: anp.sin(anp.dot(A, x)), np.array([0.3, 0.2, -0.1]),
                                 lambda x: np.cos(A @ x)[:, None] * A * np.array([1, 1.02, 1]))
    fig = report.plot(tmp_path / "jac.png")
    ax = fig.axes[0]
    assert ax.get_ylabel() == "output (flat index)" and ax.get_images()[0].get_array().shape == (2, 3)
    letters = sorted(t.get_text() for t in ax.texts)
    assert letters == ["D", "D"]      # the wrong column, one letter per output
