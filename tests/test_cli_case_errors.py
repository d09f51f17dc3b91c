"""The command line on a module with several cases, one of which cannot run: the others
still run, the --json document marks it, the exit status is the worst outcome; options
that name parameters are checked against every case before any runs."""
import json
import textwrap

import numpy as np
import pytest

from cli_runs import run_check as run

# A least-squares fit (common practice, no source) declared four times: right, with a
# wrong factor in b, with a gradient of the wrong shape for W, and right again.
MODULE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    A = np.array([[1.0, 2.0], [0.5, -1.0], [3.0, 0.25]])
    Y = np.array([1.0, -2.0, 0.5])
    P = {"W": np.array([[0.3, -0.2], [0.1, 0.4]]), "b": np.array([0.2, -0.1])}

    def cost(p):
        r = A @ p["W"] @ np.array([1.0, 0.5]) + p["b"].sum() - Y
        return float(0.5 * r @ r)

    def grad(p):
        r = A @ p["W"] @ np.array([1.0, 0.5]) + p["b"].sum() - Y
        return {"W": np.outer(A.T @ r, [1.0, 0.5]), "b": np.full(2, r.sum())}

    def grad_factor(p):
        g = grad(p)
        return {"W": g["W"], "b": 2 * g["b"]}

    def grad_transposed(p):
        g = grad(p)
        return {"W": g["W"][:, :1], "b": g["b"]}

    def undeclared(p):
        return cost(p)

    right = gk.case(gradient=grad, params=P)(cost)
    {extra}
    shape = gk.case(gradient=grad_transposed, params=P)(cost)
    right_again = gk.case(gradient=grad, params=P)(cost)
""")

FACTOR = "factor = gk.case(gradient=grad_factor, params=P)(cost)"
PLANTED = "planted = gk.case(gradient=grad_transposed, params=P, expect_mismatch=True)(cost)"


def write(tmp_path, extra=""):
    path = tmp_path / "fits.py"
    path.write_text(MODULE.replace("{extra}", extra))
    return path


def test_a_case_that_cannot_run_does_not_stop_the_others(tmp_path, capsys):
    report = tmp_path / "run.json"
    code, out, err = run(capsys, write(tmp_path, FACTOR), "--quiet", "--json", report)
    lines = out.splitlines()
    assert [line.rsplit("[", 1)[1] for line in lines] == \
        ["right]", "factor]", "shape]", "right_again]"]
    assert lines[2].startswith("COULD NOT RUN: gradient for parameter 'W': expected shape")
    assert lines[3].startswith("PASS")
    assert "error: case shape: gradient for parameter 'W'" in err
    assert code == 1          # the mismatch of `factor` is the worst outcome
    data = json.loads(report.read_text())
    assert data["complete"] is True and data["passed"] is False and data["not_run"] == []
    by_case = {c["case"]: c for c in data["checks"]}
    assert list(by_case) == ["right", "factor", "shape", "right_again"]
    assert by_case["shape"]["report"] is None and by_case["shape"]["as_expected"] is False
    assert "expected shape (2, 2), got (2, 1)" in by_case["shape"]["could_not_run"]
    assert by_case["right_again"]["could_not_run"] is None
    assert by_case["right_again"]["passed"] is True


def test_without_a_mismatch_a_case_that_cannot_run_exits_2(tmp_path, capsys):
    report = tmp_path / "run.json"
    code, out, err = run(capsys, write(tmp_path), "--json", report)
    assert code == 2
    assert "== shape\nCOULD NOT RUN: gradient for parameter 'W'" in out
    assert "== right_again\nPASS" in out
    assert err.count("error:") == 1 and "case shape:" in err
    assert [c["could_not_run"] is None for c in json.loads(report.read_text())["checks"]] == \
        [True, False, True]


def test_a_planted_bug_that_cannot_run_is_not_as_expected(tmp_path, capsys):
    report = tmp_path / "run.json"
    code, _, _ = run(capsys, write(tmp_path, PLANTED), "--json", report)
    planted = [c for c in json.loads(report.read_text())["checks"] if c["case"] == "planted"][0]
    assert code == 2 and planted["as_expected"] is False and planted["report"] is None
    assert planted["planted_bug"] == "not found"


def test_one_case_that_cannot_run_still_says_it_in_one_line(tmp_path, capsys):
    np.savez(tmp_path / "p.npz", W=np.array([[0.3, -0.2], [0.1, 0.4]]), b=np.zeros(2))
    code, _, err = run(capsys, f"{write(tmp_path)}:undeclared", "--params", tmp_path / "p.npz",
                       "--gradient", f"{tmp_path / 'fits.py'}:grad_transposed")
    assert code == 2
    assert err == ("gradcheck-kit: error: gradient for parameter 'W': expected shape (2, 2), "
                   "got (2, 1)\n")


@pytest.mark.parametrize("quiet", [[], ["--quiet"]])
def test_no_figure_is_drawn_for_a_case_that_cannot_run(tmp_path, capsys, quiet):
    pytest.importorskip("matplotlib")
    code, _, _ = run(capsys, write(tmp_path), "--plot", tmp_path / "fig.png", *quiet)
    assert code == 2
    assert sorted(p.name for p in tmp_path.glob("*.png")) == \
        ["fig-right.png", "fig-right_again.png"]


# Two cases with different parameters: a least-squares fit with a weight per data point
# (w, b) and a scale fit (s).
TWO_FITS = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    X = np.array([0.0, 1.0, 2.0])
    Y = np.array([1.0, 2.9, 5.2])

    def line(p):
        return float(np.sum((p["w"] * X + p["b"] - Y) ** 2))

    def line_grad(p):
        r = p["w"] * X + p["b"] - Y
        return {"w": 2 * r * X, "b": float(2 * r.sum())}

    def scale(p):
        return float(np.sum((p["s"] * X - Y) ** 2))

    def scale_grad(p):
        return {"s": float(2 * np.sum((p["s"] * X - Y) * X))}

    gk.case(gradient=line_grad, params={"w": np.array([1.0, 2.0, 1.5]), "b": 0.5})(line)
    gk.case(gradient=scale_grad, params={"s": 1.5})(scale)
""")


def test_coordinates_naming_a_parameter_some_cases_lack_stops_before_any_runs(tmp_path,
                                                                             capsys):
    (tmp_path / "two.py").write_text(TWO_FITS)
    code, out, err = run(capsys, tmp_path / "two.py", "--coordinates", "w[1]")
    assert code == 2 and out == ""
    assert err == ("gradcheck-kit: error: --coordinates 'w': case scale: no parameter named "
                   "'w'; parameters are ['s'] (name one case as TARGET:COST to check "
                   "coordinates of its own); nothing was checked\n")


def test_coordinates_out_of_range_stops_before_any_runs(tmp_path, capsys):
    (tmp_path / "two.py").write_text(TWO_FITS)
    code, out, err = run(capsys, f"{tmp_path / 'two.py'}:line", "--coordinates", "w[3]")
    assert code == 2 and out == ""
    assert "--coordinates 'w': for 'w': flat index 3 is out of range for 3 entries" in err


def test_a_bare_name_of_an_array_parameter_checks_every_entry(tmp_path, capsys):
    (tmp_path / "two.py").write_text(TWO_FITS)
    report = tmp_path / "run.json"
    code, _, err = run(capsys, f"{tmp_path / 'two.py'}:line", "--coordinates", "w",
                       "--coordinates", "b", "--json", report)
    assert code == 0, err
    rows = json.loads(report.read_text())["checks"][0]["report"]["rows"]
    assert sorted(r["name"] for r in rows) == ["b", "w[0]", "w[1]", "w[2]"]


def test_a_json_path_ending_in_a_slash_for_a_missing_folder_is_refused(tmp_path, capsys):
    missing = f"{tmp_path / 'no_such_folder'}/"
    code, out, err = run(capsys, write(tmp_path, FACTOR), "--json", missing)
    assert code == 2 and out == ""
    assert err == (f"gradcheck-kit: error: --json: {missing} names a folder (it ends with a "
                   f"slash), and there is no such folder; give a file path, such as "
                   f"{missing}report.json\n")
    assert not (tmp_path / "no_such_folder").exists()
