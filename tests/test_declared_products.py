"""Declared product cases (`gk.product_case`): J v, u^T J and H v checks collected by the
pytest plugin and by `gradcheck-kit check` like gradient cases; options checked when
declared.

The functions are invented: a small spring network's energy (its Hessian is the constant
stiffness matrix K, so H v = K v exactly; common practice: the Hessian of 1/2 x^T K x is
K for symmetric K) and a two-output map whose Jacobian is written out by hand.
"""
import json
import textwrap

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.cases import ProductCase, check_case, declared_cases
from gradcheck_kit.cli import main

MODULE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    K = np.array([[3.0, -1.0, 0.0], [-1.0, 2.0, -1.0], [0.0, -1.0, 4.0]])
    X = np.array([0.2, -0.4, 0.7])

    def energy(x):
        return 0.5 * x @ K @ x

    def energy_gradient(x):
        return K @ x

    def stiffness_times(x, v):
        return K @ v

    def stiffness_diagonal_only(x, v):      # a bug: the couplings are left out
        return np.diag(K) * v

    def warp(x):
        return np.array([np.sin(x[0]) * x[1], x[1] ** 2 + x[2]])

    def warp_jvp(x, v):
        return np.array([np.cos(x[0]) * x[1] * v[0] + np.sin(x[0]) * v[1],
                         2 * x[1] * v[1] + v[2]])

    def warp_vjp(x, u):
        return np.array([u[0] * np.cos(x[0]) * x[1], u[0] * np.sin(x[0]) + 2 * u[1] * x[1],
                         u[1]])

    def warp_jvp_wrong_sign(x, v):
        return warp_jvp(x, v) * np.array([1.0, -1.0])

    springs = gk.product_case("hvp", stiffness_times, params=X, gradient=energy_gradient,
                              seed=1)(energy)
    springs_canary = gk.product_case("hvp", stiffness_diagonal_only, params=X,
                                     gradient=energy_gradient, seed=1,
                                     expect_mismatch=True)(energy)
    forward = gk.product_case("jvp", warp_jvp, params=X, seed=2)(warp)
    backward = gk.product_case("vjp", warp_vjp, params=X, seed=2)(warp)
    flipped = gk.product_case("jvp", warp_jvp_wrong_sign, params=X, seed=2)(warp)
""")


def test_plugin_collects_product_cases(pytester):
    pytester.makepyfile(test_springs=MODULE)
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "p.json")
    result.assert_outcomes(passed=3, failed=1, xfailed=1)
    text = result.stdout.str()
    assert "_ gradient[flipped] _" in text
    assert "FAIL jacobian-vector product check: 3 of 3 probes fail" in text
    summary = text.split("gradient checks that failed", 1)[1].split("short test summary")[0]
    assert "test_springs.py::gradient[flipped]: v3 at y[1] (disagree, rel. error 2)" in summary
    assert "canary" not in summary
    checks = {c["id"].split("::")[-1]: c for c in
              json.loads((pytester.path / "p.json").read_text())["checks"]}
    assert {k: (c["passed"], c["as_expected"]) for k, c in checks.items()} == {
        "gradient[springs]": (True, True), "gradient[springs_canary]": (False, True),
        "gradient[forward]": (True, True), "gradient[backward]": (True, True),
        "gradient[flipped]": (False, False)}
    assert checks["gradient[springs]"]["report"]["title"] == "hessian-vector product check"


def test_command_line_checks_product_cases_and_their_cost_by_name(tmp_path, capsys,
                                                                   monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "springs.py").write_text(MODULE)
    code = main(["check", "springs.py", "--quiet", "--json", "run.json"])
    lines = capsys.readouterr().out.strip().splitlines()
    assert code == 1
    assert [line.split("  [")[-1] for line in lines] == [
        "springs]", "springs_canary; planted bug found, as expected]", "forward]", "backward]",
        "flipped]"]
    data = json.loads((tmp_path / "run.json").read_text())
    assert [c["planted_bug"] for c in data["checks"]] == [None, "found", None, None, None]
    # TARGET:COST: both declarations on `energy` are checked, each as declared
    assert main(["check", "springs.py:energy", "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "[springs]" in out and "[springs_canary; planted bug found, as expected]" in out


def test_a_session_seed_and_tolerance_reach_a_product_case():
    namespace = {"gk": gk, "np": np}
    exec(textwrap.dedent("""
        def scaled(x):
            return 2.0 * x

        off = gk.product_case("jvp", lambda x, v: 2.0002 * v, params=np.ones(3))(scaled)
    """), namespace)
    [(label, declared)] = declared_cases(namespace)
    assert label == "off" and isinstance(declared, ProductCase)
    assert not check_case(declared, seed=3).passed           # 1e-4 relative: found
    loose = check_case(declared, seed=3, rtol=1e-3, method="central", coordinates=2)
    assert loose.passed                                      # rtol applies; method does not


@pytest.mark.parametrize("call, message", [
    (lambda: gk.product_case("hessian", params=np.ones(2)),
     "product_case: kind: expected one of 'jvp', 'vjp', 'hvp', got 'hessian'"),
    (lambda: gk.product_case("jvp"), "product_case: params= is required"),
    (lambda: gk.product_case("jvp", params=np.ones(2), gradient=np.sum),
     "product_case: gradient= is for kind 'hvp'"),
    (lambda: gk.product_case("hvp", np.ones(2), params=np.ones(2)),
     "product_case: product: expected a function or None, got a ndarray"),
    (lambda: gk.product_case("vjp", params=np.ones(2), probes=0),
     "product_case: probes: expected an int >= 1, got 0"),
    (lambda: gk.product_case("vjp", params=np.ones(2), seed=-2),
     "product_case: seed: expected None or an int >= 0, got -2"),
    (lambda: gk.product_case("vjp", params=np.ones(2), rtol=float("nan")),
     "product_case: rtol: expected None or a finite number >= 0, got nan"),
    (lambda: gk.product_case("jvp", params=np.ones(2), expect_mismatch=1),
     "product_case: expect_mismatch: expected True or False, got 1 (int)"),
    (lambda: gk.product_case("jvp", params=np.ones(2))("warp"),
     "product_case: decorates a function, got str"),
])
def test_ill_formed_product_declarations_are_refused_when_applied(call, message):
    with pytest.raises(gk.CheckInputError) as caught:
        call()
    assert message in str(caught.value) and "\n" not in str(caught.value)
