"""A report keeps its rows as columns and builds Row objects only when they are read.

What users rely on: `.rows`, `.mismatches`, the counts, the text and the JSON are the
same whether the Row objects were built first or never; a report pickles; and a full
check of many coordinates no longer keeps one Python object per coordinate.
"""
import dataclasses
import gc
import json
import pickle
import tracemalloc

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.report import GradientReport, Row, RowColumns


# Module-level costs, so that a report (which keeps its cost for the figures) pickles.
def layered_cost(p):
    """A small invented model: a tanh layer, a kinked penalty on b, a cubic in s."""
    z = p["W"] @ np.ones(4) + p["s"]
    return float(np.sum(np.tanh(z) ** 2) + np.sum(np.abs(p["b"])) + p["s"] ** 3)


def layered_gradient(p):
    z = p["W"] @ np.ones(4) + p["s"]
    t = np.tanh(z)
    d = 2 * t * (1 - t ** 2)
    return {"W": np.outer(d, np.ones(4)), "b": np.sign(p["b"]),
            "s": float(np.sum(d) + 3 * p["s"] ** 2)}


def wrong_gradient(p):
    g = layered_gradient(p)
    g["W"] = 1.5 * g["W"]          # a factor on one parameter, one entry's sign flipped
    g["W"][0, 1] = -g["W"][0, 1]
    return g


def params():
    rng = np.random.default_rng(11)
    return {"W": rng.normal(size=(3, 4)), "b": np.array([0.0, 0.4, -0.3, 1.1]), "s": 0.7}


def sum_of_squares(v):
    return float(np.sum(v ** 2))


def nan_for_positive(v):
    return np.where(v > 0, np.nan, 2 * v)


CASES = {
    "right": (layered_cost, params, layered_gradient, {}),
    "wrong": (layered_cost, params, wrong_gradient, {"method": "central"}),
    "kink and wrong": (layered_cost, params, wrong_gradient, {"method": "richardson"}),
    "non-finite gradient": (sum_of_squares, lambda: np.array([0.5, -1.0, 2.0]),
                            nan_for_positive, {}),
    "sampled": (layered_cost, params, wrong_gradient, {"coordinates": 2, "seed": 3}),
}


def checked(case):
    cost, point, gradient, options = CASES[case]
    return gk.compare_gradient(cost, point(), gradient, **options)


def eager_copy(report):
    """The same report given its rows as a ready-made list (the form other checks use)."""
    fields = {f.name: getattr(report, f.name) for f in dataclasses.fields(report)}
    fields["rows"] = [dataclasses.replace(r) for r in report.rows]
    return GradientReport(**fields)


@pytest.mark.parametrize("case", sorted(CASES))
def test_rows_built_on_demand_equal_rows_given_as_a_list(case):
    report = checked(case)
    eager = eager_copy(report)
    assert report.rows == eager.rows
    assert [type(r) for r in report.rows] == [Row] * len(report.rows)
    assert report == eager


@pytest.mark.parametrize("case", sorted(CASES))
def test_summaries_text_and_json_do_not_depend_on_how_rows_are_held(case):
    fresh = checked(case)          # its Row objects are never built here before rendering
    text, data = fresh.to_text(), fresh.to_json()
    short = fresh.to_text(max_rows=2)
    summaries = (fresh.passed, fresh.ran, fresh.counts, fresh.worst_relative_error,
                 fresh.worst_relative_error_over, fresh.parameters,
                 [(r.name, r.verdict) for r in fresh.mismatches])
    assert fresh.__dict__["_rows"] is None        # nothing above built the rows
    eager = eager_copy(fresh)
    assert (eager.to_text(), eager.to_json(), eager.to_text(max_rows=2)) == (text, data, short)
    assert (eager.passed, eager.ran, eager.counts, eager.worst_relative_error,
            eager.worst_relative_error_over, eager.parameters,
            [(r.name, r.verdict) for r in eager.mismatches]) == summaries
    assert len(fresh.rows) == fresh.checked     # building the rows changes nothing
    assert (fresh.to_text(), fresh.to_json()) == (text, data)


def test_a_wrong_factor_is_reported_from_columns():
    report = checked("wrong")
    assert not report.passed
    names = [r.name for r in report.mismatches]
    assert "W[0, 1]" in names and all(n.startswith("W[") for n in names)
    assert report.counts["disagree"] == 12 and report.checked == 17
    by_name = {p["name"]: p for p in report.parameters}
    assert by_name["W"]["counts"] == {"disagree": 12} and by_name["W"]["checked"] == 12
    assert json.loads(report.to_json())["rows"][0]["name"] == "W[0, 0]"


def test_rows_read_twice_are_the_same_list():
    report = checked("right")
    assert report.rows is report.rows


def test_a_report_pickles_with_its_rows_as_columns():
    report = checked("wrong")
    again = pickle.loads(pickle.dumps(report))
    assert again.__dict__["_rows"] is None
    assert (again.to_text(), again.to_json()) == (report.to_text(), report.to_json())
    assert again.rows == report.rows
    assert again == report


def test_a_report_given_a_list_still_works_and_pickles():
    rows = [Row("u[0]", "u", (0,), 0, 1.0, 1.0, 0.0, 0.0, 1e-12, "agree"),
            Row("u[1]", "u", (1,), 1, 2.0, 3.0, 1.0, 1 / 3, 1e-12, "disagree", "off")]
    report = GradientReport(rows=rows, method="central", evaluations=4, total=2)
    assert report.rows is rows
    assert not report.passed and report.counts == {"agree": 1, "disagree": 1}
    assert report.mismatches == [rows[1]] and report.mismatches[0] is rows[1]
    assert "u[1]        disagree" in report.to_text()
    assert pickle.loads(pickle.dumps(report)) == report


def test_columns_refuse_an_unknown_verdict():
    _, layout = gk.tree.flatten(np.zeros(2))
    with pytest.raises(ValueError, match="unknown verdict 'maybe'"):
        RowColumns.from_arrays(layout, [0, 1], [1.0, 2.0], [1.0, 2.0], ["agree", "maybe"],
                               ["", ""])


def few_entries(n):
    """A cost that reads four of n entries, and its gradient."""
    def cost(v):
        return v[0] * v[1] + np.sin(v[n // 2]) + v[n - 1] ** 2

    def gradient(v):
        g = np.zeros(n)
        g[0], g[1], g[n // 2], g[n - 1] = v[1], v[0], np.cos(v[n // 2]), 2 * v[n - 1]
        return g
    return cost, gradient


def test_the_report_of_a_full_check_of_1e5_coordinates_is_a_few_vectors():
    # One Row object per coordinate took about 570 bytes, some 70 vectors of n floats;
    # the columns are six vectors, the figures' copies of the point and gradient three.
    n = 100_000
    x = np.random.default_rng(2).normal(size=n)
    cost, gradient = few_entries(n)
    gc.collect()
    tracemalloc.start()
    try:
        report = gk.compare_gradient(cost, x, gradient, method="central")
        gc.collect()
        kept = tracemalloc.get_traced_memory()[0]
    finally:
        tracemalloc.stop()
    assert report.passed and report.checked == n
    assert kept < 25 * 8 * n
