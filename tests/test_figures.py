"""Figures render to a temporary folder; checked by the artists in the figure (images,
lines, markers, texts, titles, labels, ticks), never by pixels."""
import warnings

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.figures import _grid

matplotlib = pytest.importorskip("matplotlib")

RNG = np.random.default_rng(1)
X = RNG.normal(size=(20, 4))
Y = RNG.normal(size=(20, 4))


def cost(p):
    return 0.5 * np.mean(np.sum((X @ p["W"] - Y) ** 2, axis=1)) + np.sum(np.cos(p["b"]))


def transposed(p):
    return {"W": (X.T @ (X @ p["W"] - Y) / 20).T, "b": -np.sin(p["b"])}


P = {"W": RNG.normal(size=(4, 4)), "b": np.array([0.3, 1.2, -0.4])}


def panels(fig):
    """The axes that are panels (colour bars have no title)."""
    return {ax.get_title(): ax for ax in fig.axes if ax.get_title()}


def test_error_map_of_a_transposed_gradient_shows_the_pattern(tmp_path):
    report = gk.compare_gradient(cost, P, transposed)
    values, verdict = _grid([r for r in report.rows if r.parameter == "W"], (4, 4))
    off = ~np.eye(4, dtype=bool)
    assert np.all(verdict[off] == "disagree") and np.all(verdict[~off] == "agree")
    assert values[off].min() > -3 > values[~off].max()   # dark off the diagonal, light on it
    fig = report.plot(tmp_path / "map.png")
    w = panels(fig)["W"]
    assert w.get_images()[0].get_array().shape == (4, 4)
    assert sorted(t.get_text() for t in w.texts) == ["D"] * 12
    assert any(ax.get_ylabel().startswith("log10 relative error") for ax in fig.axes)
    assert (tmp_path / "map.png").stat().st_size > 10_000


def test_the_title_is_said_once(tmp_path):
    report = gk.compare_gradient(cost, P, transposed)
    fig = report.plot(tmp_path / "t.png")
    summary = report.to_text().splitlines()[0]
    assert fig.get_suptitle().split() == summary.split()    # wrapped to the figure's width
    assert not any(summary in ax.get_title() or "relative error per entry" in ax.get_title()
                   for ax in fig.axes)


def test_one_dimensional_parameter_gets_an_index_axis(tmp_path):
    fig = gk.compare_gradient(cost, P, transposed).plot(tmp_path / "b.png")
    b = next(ax for t, ax in panels(fig).items() if t.startswith("b"))
    assert b.get_xlabel() == "index" and b.get_ylabel() == "log10 relative error"
    assert not b.get_images()                                   # no one-row image
    ticks = [t for t in b.get_xticks() if -0.5 <= t <= 2.5]
    assert all(float(t).is_integer() for t in ticks)
    assert len(b.collections[0].get_offsets()) == 3             # one marker per entry


def test_a_large_parameter_with_few_checked_entries_shows_those_entries(tmp_path):
    n = 20_000
    x = np.linspace(-1, 1, n)

    def wrong(v):
        g = np.sin(2 * v)
        g[::97] *= 1.01
        return g
    report = gk.compare_gradient(lambda v: np.sum(np.sin(v) ** 2), x, wrong, coordinates=12,
                                 seed=0)
    fig = report.plot(tmp_path / "big.png", sweep=False)
    ax = next(a for t, a in panels(fig).items() if t.startswith("x"))
    assert ax.get_title() == f"x (12 of {n} entries checked)"
    assert len(ax.collections[0].get_offsets()) == 12
    assert len(ax.get_xticks()) <= 8                            # ticks that can be read
    letters = [t.get_text() for t in ax.texts]
    assert letters.count("D") == sum(r.verdict == "disagree" for r in report.rows)


@pytest.mark.parametrize("method", ["richardson", "complex-step", "central"])
def test_the_step_sweep_uses_the_method_of_the_check(tmp_path, method):
    f = lambda v: np.sum(np.exp(np.sin(v)))  # noqa: E731
    g = lambda v: np.cos(v) * np.exp(np.sin(v))  # noqa: E731
    report = gk.compare_gradient(f, np.array([0.7, -0.2]), g, method=method)
    fig = report.plot(tmp_path / "sweep.png", remainder=False)
    sweep = next(ax for t, ax in panels(fig).items() if t.startswith(f"{method}: error"))
    assert sweep.get_xscale() == "log" and sweep.get_yscale() == "log"
    marked = [line.get_xdata()[0] for line in sweep.get_lines() if line.get_linestyle() == "--"]
    h = report.reevaluation.steps
    assert np.allclose(sorted(marked), sorted(h[[r.flat_index for r in report.rows]]))


@pytest.mark.parametrize("method", ["richardson", "central"])
def test_the_step_used_sits_near_the_bottom_of_the_v(method):
    report = gk.compare_gradient(lambda v: np.sum(np.exp(np.sin(v))), np.array([0.7, -0.2]),
                                 lambda v: np.cos(v) * np.exp(np.sin(v)), method=method)
    sweep = report.reevaluation.step_sweep(0)
    err = np.abs(sweep["derivatives"] - sweep["analytic"])
    best = int(np.argmin(np.where(err > 0, err, np.inf)))
    assert 2 < best < len(err) - 2                              # the minimum is inside
    assert err[0] > 1e3 * err[best] and err[-1] > 1e3 * err[best]   # both arms rise
    assert 1 / 64 < sweep["chosen_step"] / sweep["steps"][best] < 64


def test_remainder_panel_says_when_the_direction_crosses_a_kink(tmp_path):
    x = np.array([0.001, -0.002, 0.5])
    w = np.array([1.0, 2.0, 3.0])
    result = gk.remainder_order(lambda v: np.sum(np.maximum(v, 0) * w), x,
                                lambda v: (v > 0) * w, seed=0)
    assert result.kink_step is not None and not result.passed
    fig = result.plot(tmp_path / "kink.png")
    ax = fig.axes[0]
    assert "kink" in ax.get_title()
    assert any("kink" in t.get_text() for t in ax.get_legend().get_texts())
    assert ax.patches                                           # the span where it crossed


def test_exact_differences_draw_without_warnings_or_empty_panels(tmp_path):
    report = gk.compare_gradient(lambda v: np.sum(v ** 2), np.array([1.0, 2.0, 3.0]),
                                 lambda v: 2 * v, method="central")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig = report.plot(tmp_path / "exact.png")
    for ax in panels(fig).values():
        assert ax.get_lines() or ax.collections or ax.get_images(), ax.get_title()


def test_plot_leaves_the_callers_backend_alone(tmp_path):
    before = matplotlib.get_backend()
    matplotlib.use("svg")
    try:
        gk.compare_gradient(cost, P, transposed).plot(tmp_path / "x.png")
        assert matplotlib.get_backend() == "svg"
    finally:
        matplotlib.use(before)


def test_taylor_figure_alone(tmp_path):
    result = gk.remainder_order(lambda x: np.sum(np.sin(x) ** 2), np.array([0.3, 0.9]),
                                lambda x: np.sin(2 * x))
    fig = result.plot(tmp_path / "taylor.png")
    assert (tmp_path / "taylor.png").stat().st_size > 5_000
    assert fig.axes[0].get_yscale() == "log" and fig.axes[0].get_xlabel() == "step h along v"


def test_jacobian_figure_maps_outputs_against_inputs(tmp_path):
    import autograd.numpy as anp

    A = np.array([[1.0, 2.0, 0.5], [0.3, 1.0, 3.0]])
    report = gk.compare_jacobian(lambda x: anp.sin(anp.dot(A, x)), np.array([0.3, 0.2, -0.1]),
                                 lambda x: np.cos(A @ x)[:, None] * A * np.array([1, 1.02, 1]))
    fig = report.plot(tmp_path / "jac.png")
    ax = fig.axes[0]
    assert ax.get_ylabel() == "output (flat index)"
    assert ax.get_images()[0].get_array().shape == (2, 3)
    letters = sorted(t.get_text() for t in ax.texts)
    assert letters == ["D", "D"]      # the wrong column, one letter per output


def test_the_report_keeps_only_a_small_reevaluation():
    report = gk.compare_gradient(cost, P, transposed)
    again = report.reevaluation
    assert not hasattr(report, "source")
    assert set(vars(again)) == {"cost", "layout", "base", "analytic", "steps", "method", "f0",
                                "eps_f", "noise", "vectorized"}
    again.base[0] += 1.0                                        # a copy, not the user's array
    assert P["W"][0, 0] != again.base[0]
