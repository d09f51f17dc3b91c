"""What the report says: summary, worst-first table, per-parameter lines, JSON schema,
and the assertion helper in pytest and unittest."""
import json
import unittest

import numpy as np
import pytest

import gradcheck_kit as gk


def cost(p):
    return np.sum(np.sin(p["W"]) ** 2) + np.sum(p["b"] ** 3)


def right(p):
    return {"W": np.sin(2 * p["W"]), "b": 3 * p["b"] ** 2}


def wrong(p):
    g = right(p)
    g["W"] = g["W"].copy()
    g["W"][1, 2] *= -1
    return g


PARAMS = {"W": np.linspace(0.1, 1.2, 12).reshape(3, 4), "b": np.array([0.5, -1.0, 2.0])}


def test_passing_summary_line():
    text = gk.compare_gradient(cost, PARAMS, right).to_text()
    first = text.splitlines()[0]
    assert first.startswith("PASS") and "all 15 coordinates agree" in first
    assert "method complex-step" in first and "evaluations" in first


def test_failing_report_puts_the_wrong_coordinate_first():
    report = gk.compare_gradient(cost, PARAMS, wrong)
    lines = report.to_text().splitlines()
    assert lines[0].startswith("FAIL") and "1 of 15 coordinates fail (1 disagree)" in lines[0]
    assert lines[2].split()[:3] == ["W[1,", "2]", "disagree"]
    assert [r.name for r in report.mismatches] == ["W[1, 2]"]
    assert str(report) == report.to_text()


def test_table_is_capped_with_a_count_of_the_rest():
    text = gk.compare_gradient(cost, PARAMS, wrong).to_text(max_rows=4)
    assert "... 11 more rows: 11 agree" in text


def test_per_parameter_lines():
    text = gk.compare_gradient(cost, PARAMS, wrong).to_text()
    lines = text.splitlines()
    start = lines.index("  by parameter:")
    w_line, b_line = lines[start + 1], lines[start + 2]
    assert w_line.split()[0] == "W" and "11 agree, 1 disagree" in w_line
    assert b_line.split()[0] == "b" and "3 agree" in b_line


def test_json_round_trip_and_schema(tmp_path):
    report = gk.compare_gradient(cost, PARAMS, wrong)
    path = tmp_path / "report.json"
    text = report.to_json(path)
    data = json.loads(path.read_text())
    assert data == json.loads(text)
    assert data["schema"] == "gradcheck_kit/gradient-report" and data["schema_version"] == 2
    assert data["passed"] is False and data["counts"] == {"agree": 14, "disagree": 1}
    row = next(r for r in data["rows"] if r["verdict"] == "disagree")
    assert row["name"] == "W[1, 2]" and row["parameter"] == "W" and row["index"] == [1, 2]
    assert row["flat_index"] == 6
    assert set(row) >= {"analytic", "numeric", "absolute_error", "relative_error", "error_estimate"}
    assert data["evaluations"] == report.evaluations


def test_json_writes_null_for_non_finite_numbers():
    report = gk.compare_gradient(lambda x: np.sum(x ** 2), np.ones(2), [np.nan, 2.0])
    data = json.loads(report.to_json())
    bad = next(r for r in data["rows"] if r["verdict"] == "non-finite")
    assert bad["analytic"] is None and bad["relative_error"] is None


def test_suggested_tolerances_are_passed_by_the_agreeing_coordinates():
    report = gk.compare_gradient(cost, PARAMS, wrong)
    rtol, atol = report.suggested_rtol, report.suggested_atol
    for r in report.rows:
        if r.verdict == "agree":
            assert abs(r.analytic - r.numeric) <= atol + rtol * abs(r.numeric)
    redo = gk.compare_gradient(cost, PARAMS, right, rtol=rtol, atol=atol)
    assert redo.passed


def test_explicit_tolerances_follow_numpys_rule():
    f = lambda x: np.sum(x ** 2)  # noqa: E731
    off = np.array([2.0 * 1.001, 4.0])        # first entry 0.1% high
    assert not gk.compare_gradient(f, np.array([1.0, 2.0]), off, rtol=1e-4).passed
    assert gk.compare_gradient(f, np.array([1.0, 2.0]), off, rtol=2e-3).passed
    assert gk.compare_gradient(f, np.array([1.0, 2.0]), off, atol=0.01).passed


def test_assert_helper_returns_the_report_when_all_agree():
    report = gk.assert_gradient_matches(cost, PARAMS, right)
    assert isinstance(report, gk.GradientReport) and report.passed


def test_assert_helper_raises_an_assertion_error_with_the_report():
    with pytest.raises(gk.GradientMismatchError) as info:
        gk.assert_gradient_matches(cost, PARAMS, wrong)
    assert isinstance(info.value, AssertionError)
    assert "W[1, 2]" in str(info.value) and str(info.value) == info.value.report.to_text()


class AssertionInUnittest(unittest.TestCase):
    def test_failure_is_a_test_failure_not_an_error(self):
        result = unittest.TestResult()

        class Inner(unittest.TestCase):
            def runTest(self):
                gk.assert_gradient_matches(cost, PARAMS, wrong)

        Inner().run(result)
        self.assertEqual((len(result.failures), len(result.errors)), (1, 0))
        self.assertIn("W[1, 2]", result.failures[0][1])
