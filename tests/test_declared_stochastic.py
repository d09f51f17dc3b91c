"""Declared stochastic cases (`gk.stochastic_case`): collected by the pytest plugin and by
`gradcheck-kit check` like gradient cases, with the same failure display, session-report
entries, planted-bug marking and xdist merging; their options are checked when declared.

The scenario is invented: a least-squares fit of delivery times on 64 invented routes,
its gradient estimated from mini-batches of 8 routes.  The mean of a mini-batch gradient
drawn without replacement is the full-data gradient (common practice: each row is in the
batch with probability B/N); dividing by N instead of B shrinks it by B/N = 1/8.
"""
import json
import textwrap

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.cases import StochasticCase, check_case, declared_cases
from gradcheck_kit.cli import main

MODULE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    ROUTES = np.random.default_rng(11).normal(size=(64, 2))
    TIMES = ROUTES @ np.array([1.5, -0.5]) + 0.1 * np.random.default_rng(12).normal(size=64)
    W = np.array([0.3, 0.2])

    def full_gradient(w):
        return ROUTES.T @ (ROUTES @ w - TIMES) / len(TIMES)

    def batch_gradient(w, rng):
        rows = rng.choice(len(TIMES), size=8, replace=False)
        return ROUTES[rows].T @ (ROUTES[rows] @ w - TIMES[rows]) / 8

    def batch_gradient_over_n(w, rng):          # the bug: divided by the data size
        rows = rng.choice(len(TIMES), size=8, replace=False)
        return ROUTES[rows].T @ (ROUTES[rows] @ w - TIMES[rows]) / len(TIMES)

    unbiased = gk.stochastic_case(params=W, gradient=full_gradient, seed=5,
                                  max_draws=1024)(batch_gradient)
    shrunk = gk.stochastic_case(params=W, gradient=full_gradient, seed=5,
                                max_draws=1024)(batch_gradient_over_n)
    canary = gk.stochastic_case(params=W, gradient=full_gradient, seed=5, max_draws=1024,
                                expect_mismatch=True)(batch_gradient_over_n)
    unseeded = gk.stochastic_case(params=W, gradient=full_gradient,
                                  max_draws=1024)(batch_gradient)
""")


def test_plugin_collects_stochastic_cases_with_verdicts_report_and_planted_bug(pytester):
    pytester.makepyfile(test_routes=MODULE)
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "s.json",
                                "--gradient-seed", "7", "-rx")
    result.assert_outcomes(passed=2, failed=1, xfailed=1)
    text = result.stdout.str()
    assert "_ gradient[shrunk] _" in text
    assert "FAIL stochastic gradient check: 2 of 2 coordinates fail" in text
    summary = text.split("gradient checks that failed", 1)[1].split("short test summary")[0]
    assert "test_routes.py::gradient[shrunk]: x[0] (disagree, rel. bias " in summary
    assert "hint: factor:" in summary and "batch size versus data size" in summary
    assert "gradient[canary]" not in summary and "gradient[unbiased]" not in summary
    checks = {c["id"].split("::")[-1]: c for c in
              json.loads((pytester.path / "s.json").read_text())["checks"]}
    assert set(checks) == {f"gradient[{n}]" for n in ("unbiased", "shrunk", "canary", "unseeded")}
    shrunk, canary = checks["gradient[shrunk]"], checks["gradient[canary]"]
    assert shrunk["report"]["schema"] == "gradcheck_kit/stochastic-gradient-report"
    assert (shrunk["kind"], shrunk["passed"], shrunk["as_expected"]) == ("case", False, False)
    assert (canary["passed"], canary["expect_mismatch"], canary["as_expected"]) == \
        (False, True, True)
    assert "planted bug: the mismatch above was expected" in canary["text"]
    # --gradient-seed seeds only the case that declares no seed
    assert checks["gradient[unseeded]"]["report"]["seed"] == 7
    assert checks["gradient[unbiased]"]["report"]["seed"] == 5


def test_a_planted_bias_that_is_not_found_fails_and_says_so(pytester):
    pytester.makepyfile(test_overlooked=MODULE.split("unbiased =")[0] + textwrap.dedent("""
        missed = gk.stochastic_case(params=W, gradient=full_gradient, seed=5, max_draws=512,
                                    expect_mismatch=True)(batch_gradient)
    """))
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(failed=1)
    assert "declares a planted bug, but no coordinate is biased: the check missed it" in \
        result.stdout.str()
    assert "gradient[missed]: the planted bug was not found: no coordinate is biased" in \
        result.stdout.str()


def test_command_line_checks_declared_stochastic_cases(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "routes.py").write_text(MODULE)
    code = main(["check", "routes.py", "--quiet", "--json", "run.json", "--seed", "7"])
    lines = capsys.readouterr().out.strip().splitlines()
    assert code == 1                                  # shrunk fails and is no planted bug
    assert [line.split("[")[-1] for line in lines] == [
        "unbiased]", "shrunk]", "canary; planted bug found, as expected]", "unseeded]"]
    assert lines[1].startswith("FAIL stochastic gradient check")
    checks = {c["case"]: c for c in json.loads((tmp_path / "run.json").read_text())["checks"]}
    assert checks["canary"]["planted_bug"] == "found" and checks["canary"]["as_expected"]
    assert checks["unseeded"]["report"]["seed"] == 7 and checks["unbiased"]["report"]["seed"] == 5


def test_command_line_target_names_the_estimator(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "routes.py").write_text(MODULE)
    # two declarations on batch_gradient_over_n: two cases, each as declared
    code = main(["check", "routes.py:batch_gradient_over_n", "--quiet"])
    out = capsys.readouterr().out
    assert code == 1 and "[shrunk]" in out and "[canary; planted bug found, as expected]" in out
    assert main(["check", "routes.py:batch_gradient", "--gradient", "routes.py:full_gradient"]) \
        == 2
    assert "is declared as a stochastic case" in capsys.readouterr().err
    assert main(["locate", "routes.py"]) == 2
    assert "is a stochastic case" in capsys.readouterr().err


def test_xdist_workers_send_stochastic_checks_to_the_controller(pytester):
    pytest.importorskip("xdist")
    pytester.makepyfile(test_routes_a=MODULE, test_routes_b=MODULE)
    result = pytester.runpytest_subprocess("-n", "2", "-p", "no:cacheprovider",
                                           "--gradient-report", "s.json")
    result.assert_outcomes(passed=4, failed=2, xfailed=2)
    checks = json.loads((pytester.path / "s.json").read_text())["checks"]
    assert sorted((c["id"], c["as_expected"]) for c in checks if "shrunk" in c["id"]) == \
        [("test_routes_a.py::gradient[shrunk]", False), ("test_routes_b.py::gradient[shrunk]",
                                                         False)]
    assert "test_routes_b.py::gradient[shrunk]: x[0] (disagree" in result.stdout.str()


# --- the declaration ---------------------------------------------------------------------

def draw(w, rng):
    return w + rng.normal(size=w.shape)


@pytest.mark.parametrize("declaration, message", [
    ({"params": np.ones(2)}, "stochastic_case: give exactly one reference"),
    ({"params": np.ones(2), "cost": np.sum, "gradient": np.ones(2)},
     "exactly one reference, cost= (the deterministic full cost, differentiated numerically) "
     "or gradient= (the full gradient: a function of params, or its values); got both"),
    ({"gradient": np.ones(2)}, "stochastic_case: params= is required"),
    ({"params": np.ones(2), "gradient": np.ones(2), "level": 0.7},
     "stochastic_case: level: expected a number with 0 < level <= 0.5"),
    ({"params": np.ones(2), "gradient": np.ones(2), "max_draws": 8},
     "stochastic_case: max_draws: expected an integer >= 16, got 8"),
    ({"params": np.ones(2), "gradient": np.ones(2), "seed": -1},
     "stochastic_case: seed: expected None or a non-negative integer, got -1"),
    ({"params": np.ones(2), "gradient": np.ones(2), "resolution": 0},
     "stochastic_case: resolution: expected a positive number"),
    ({"params": np.ones(2), "gradient": np.ones(2), "expect_mismatch": "yes"},
     "stochastic_case: expect_mismatch: expected True or False, got 'yes' (str)"),
    ({"params": np.ones(2), "gradient": np.ones(2), "name": ""},
     "stochastic_case: name: expected a non-empty str or None, got ''"),
    ({"params": "weights.npz", "gradient": np.ones(2)},
     "stochastic_case: params: expected a structure of arrays or floats"),
    ({"params": np.ones(2), "cost": "loss"}, "stochastic_case: cost: expected a function"),
])
def test_ill_formed_declarations_are_refused_when_applied(declaration, message):
    with pytest.raises(gk.CheckInputError) as caught:
        gk.stochastic_case(**declaration)
    assert message in str(caught.value) and "\n" not in str(caught.value)


def test_a_strategy_as_params_is_refused_with_the_reason():
    st = pytest.importorskip("hypothesis.strategies")
    with pytest.raises(gk.CheckInputError, match="strategies are for gk.case"):
        gk.stochastic_case(params=st.just(np.ones(2)), gradient=np.ones(2))


def test_a_bare_decorator_asks_for_parentheses_and_a_reference():
    with pytest.raises(gk.CheckTypeError, match=r"with parentheses"):
        gk.stochastic_case(draw)


def test_decorating_something_not_callable_is_refused():
    with pytest.raises(gk.CheckTypeError, match="decorates a function sample_gradient"):
        gk.stochastic_case(params=np.ones(2), gradient=np.ones(2))(3.0)


def test_declaration_returns_the_estimator_and_registers_one_case():
    namespace = {"gk": gk, "np": np, "draw": draw}
    exec("noise = gk.stochastic_case(params=np.ones(2), gradient=np.ones(2), seed=1)(draw)",
         namespace)
    assert namespace["noise"] is draw
    [(label, declared)] = declared_cases(namespace)
    assert label == "noise" and isinstance(declared, StochasticCase)
    result = check_case(declared, seed=9, method="central", rtol=1e-9)  # gradient-only options
    assert result.passed and result.report.seed == 1                  # are not applied here


def test_a_params_function_is_called_with_the_cases_seed():
    seen = []

    def start(rng):
        seen.append(rng.integers(1 << 30))
        return np.ones(2)

    declared = StochasticCase(draw, start, {"gradient": np.ones(2), "seed": 4,
                                            "max_draws": 256}, "noise")
    check_case(declared)
    check_case(declared)
    assert len(seen) == 2 and seen[0] == seen[1] == np.random.default_rng(4).integers(1 << 30)
