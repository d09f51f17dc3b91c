"""Figures in the cases the figure tests of test_figures.py leave out: no matplotlib, a
remainder with no order to fit, a report that cannot call the cost again, a report with
nothing to draw."""
import dataclasses
import sys
import warnings

import numpy as np
import pytest

import gradcheck_kit as gk

pytest.importorskip("matplotlib")


def _cubic_report():
    params = {"W": np.arange(1.0, 7.0).reshape(2, 3), "s": 1.5}
    return gk.compare_gradient(lambda p: float(np.sum(p["W"] ** 3) + p["s"] ** 2), params,
                               lambda p: {"W": 3 * p["W"] ** 2, "s": 2 * p["s"]})


def test_without_matplotlib_plot_says_how_to_install_it(tmp_path, monkeypatch):
    report = _cubic_report()
    monkeypatch.setitem(sys.modules, "matplotlib", None)   # as if not installed
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)
    with pytest.raises(gk.CheckInputError) as info:
        report.plot(tmp_path / "fig.png")
    assert "figures need matplotlib: pip install 'gradcheck_kit[plot]'" in str(info.value)
    assert not (tmp_path / "fig.png").exists()


def test_a_linear_cost_has_no_remainder_order_and_the_figure_says_so(tmp_path):
    # f(x) = 3 sum(x) with its exact gradient: the remainder is rounding only, no slope
    result = gk.remainder_order(lambda x: float(3 * np.sum(x)), np.array([0.3, -0.9]),
                                lambda x: 3 * np.ones_like(x), seed=1)
    assert not np.isfinite(result.order) and not result.passed
    fig = result.plot(tmp_path / "remainder.png")
    assert fig.axes[0].get_title().endswith(": no order fitted")
    labels = fig.axes[0].get_legend_handles_labels()[1]
    assert not any(label.startswith("fitted") for label in labels)
    assert (tmp_path / "remainder.png").stat().st_size > 0


def test_a_report_that_cannot_call_the_cost_again_still_maps_its_rows(tmp_path):
    report = dataclasses.replace(_cubic_report(), reevaluation=None)
    fig = report.plot(tmp_path / "map.png")
    titles = [ax.get_title() for ax in fig.axes]
    assert titles[0] == "W"                       # the map, its shape taken from the rows
    assert [im.get_array().shape for ax in fig.axes for im in ax.images] == [(2, 3)]
    assert not any("against step" in t or "remainder" in t for t in titles)
    assert (tmp_path / "map.png").stat().st_size > 0


def test_a_report_with_nothing_to_draw_shows_its_text(tmp_path):
    report = gk.compare_gradient(lambda p: p["a"] ** 2 * p["b"], {"a": 1.5, "b": -0.5},
                                 lambda p: {"a": 2 * p["a"] * p["b"], "b": p["a"] ** 2})
    fig = report.plot(tmp_path / "text.png", sweep=False, remainder=False)
    assert len(fig.axes) == 1 and not fig.axes[0].axison
    shown = fig.axes[0].texts[0].get_text()
    # the table's lines as printed, long ones wrapped: the same words in the same order
    assert shown.split() == "\n".join(report.to_text().splitlines()[1:8]).split()
    assert "a" in shown and "agree" in shown


def test_a_report_with_nothing_to_draw_draws_without_warnings(tmp_path):
    report = gk.compare_gradient(lambda p: p["a"] ** 2 * p["b"], {"a": 1.5, "b": -0.5},
                                 lambda p: {"a": 2 * p["a"] * p["b"], "b": p["a"] ** 2})
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        report.plot(tmp_path / "text.png", sweep=False, remainder=False)
