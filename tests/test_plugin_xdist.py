"""Under pytest-xdist the workers' checks reach the controller: the session report holds
every check and the summary section lists the failed ones.  The costs are invented."""
import json
import textwrap

import pytest

pytest.importorskip("xdist")

MODULE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    X0 = np.array([0.4, -0.7, 1.3])

    def heat(x):
        return float(np.sum(np.exp(0.5 * x)))

    def heat_gradient(x):
        return 0.5 * np.exp(0.5 * x)

    def heat_gradient_no_half(x):
        return np.exp(0.5 * x)

    good_{n} = gk.case(heat_gradient, params=X0, method="central")(heat)
    bad_{n} = gk.case(heat_gradient_no_half, params=X0, method="central")(heat)

    def test_fixture_{n}(gradient_audit):
        gradient_audit.assert_matches(heat, X0, heat_gradient, method="central")

    def test_assertion_{n}():
        gk.assert_gradient_matches(heat, X0, heat_gradient_no_half, method="central")
""")


def test_two_workers_send_every_check_to_the_session_report_and_summary(pytester):
    pytester.makepyfile(**{f"test_heat_{n}": MODULE.format(n=n) for n in (1, 2)})
    result = pytester.runpytest_subprocess("-n", "2", "-p", "no:cacheprovider",
                                           "--gradient-report", "session.json")
    result.assert_outcomes(passed=4, failed=4)
    data = json.loads((pytester.path / "session.json").read_text())
    assert data["schema_version"] == 2
    found = sorted((c["id"], c["kind"], c["passed"]) for c in data["checks"])
    assert found == sorted(
        [(f"test_heat_{n}.py::gradient[good_{n}]", "case", True) for n in (1, 2)]
        + [(f"test_heat_{n}.py::gradient[bad_{n}]", "case", False) for n in (1, 2)]
        + [(f"test_heat_{n}.py::test_fixture_{n}", "fixture", True) for n in (1, 2)]
        + [(f"test_heat_{n}.py::test_assertion_{n}", "assertion", False) for n in (1, 2)])
    summary = result.stdout.str().split("gradient checks that failed", 1)[1]
    summary = summary.split("short test summary")[0]
    listed = sorted(line.split(":")[0] + "::" + line.split("::")[1].split(":")[0]
                    for line in summary.splitlines() if "::" in line)
    assert listed == sorted([f"test_heat_{n}.py::gradient[bad_{n}]" for n in (1, 2)]
                            + [f"test_heat_{n}.py::test_assertion_{n}" for n in (1, 2)])
