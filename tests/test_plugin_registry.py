"""Every declaration is its own case: two on one function stay two, an imported case is
collected once, in the module that declared it, and items are named after their variables.

The costs are invented (a spring's energy).
"""
import json
import textwrap

import numpy as np

import gradcheck_kit as gk
from gradcheck_kit.cases import check_case, declared_cases

SPRING = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    X0 = np.array([0.3, -1.2, 2.0])

    def energy(x):
        return 0.5 * float(np.sum(x ** 2))

    def force(x):
        return x

    def force_with_typo(x):
        return 1.5 * x

    right = gk.case(force, params=X0)(energy)
    canary = gk.case(force_with_typo, params=X0, expect_mismatch=True)(energy)
    wrong = gk.case(force_with_typo, params=X0)(energy)
""")


def test_two_declarations_on_one_function_are_two_cases(pytester):
    pytester.makepyfile(test_spring=SPRING)
    result = pytester.runpytest("-p", "no:cacheprovider", "-rxX", "--gradient-report", "s.json")
    # today both items ran the last declaration's buggy gradient
    result.assert_outcomes(passed=1, failed=1, xfailed=1)
    text = result.stdout.str()
    assert "_ gradient[wrong] _" in text                  # the failure header: the item's name
    assert "gradient[energy]" not in text and "gradient case" not in text
    checks = json.loads((pytester.path / "s.json").read_text())["checks"]
    outcome = {c["id"].split("::")[-1]: (c["passed"], c["expect_mismatch"], c["as_expected"])
               for c in checks}
    assert outcome == {"gradient[right]": (True, False, True),
                       "gradient[canary]": (False, True, True),
                       "gradient[wrong]": (False, False, False)}
    summary = text.split("gradient checks that failed", 1)[1].split("short test summary")[0]
    assert "gradient[wrong]" in summary and "gradient[canary]" not in summary


def test_an_imported_case_is_collected_once_in_the_module_that_declared_it(pytester):
    pytester.makepyfile(test_spring=SPRING, test_reuse=textwrap.dedent("""
        from test_spring import right, energy, X0
        from test_spring import *  # noqa: F403

        def test_energy_is_positive():
            assert energy(X0) > 0
    """))
    result = pytester.runpytest("--collect-only", "-q", "-p", "no:cacheprovider")
    ids = [line for line in result.stdout.lines if "::" in line]
    assert ids == ["test_reuse.py::test_energy_is_positive",
                   "test_spring.py::gradient[right]", "test_spring.py::gradient[canary]",
                   "test_spring.py::gradient[wrong]"]


def test_labels_follow_name_then_variable_then_function_name():
    namespace = {}
    exec(compile(textwrap.dedent("""
        import numpy as np
        import gradcheck_kit as gk

        def energy(x):
            return float(np.sum(x ** 2))

        def declare_twice():          # declared in a helper: no variable to name them by
            gk.case(lambda x: 2 * x, params=np.ones(2))(energy)
            gk.case(lambda x: 2 * x, params=np.ones(2))(energy)

        named = gk.case(lambda x: 2 * x, params=np.ones(2), name="spring energy")(energy)

        @gk.case(lambda x: 2 * x, params=np.ones(2))
        def decorated(x):
            return float(np.sum(x ** 2))

        declare_twice()
    """), "springs.py", "exec"), namespace)
    labels = [label for label, _ in declared_cases(namespace)]
    assert labels == ["spring energy", "decorated", "energy", "energy-2"]


def test_each_declaration_keeps_its_own_gradient():
    namespace = {"gk": gk, "np": np}
    exec("def energy(x):\n    return float(np.sum(x ** 2))\n"
         "right = gk.case(lambda x: 2 * x, params=np.ones(3))(energy)\n"
         "wrong = gk.case(lambda x: 3 * x, params=np.ones(3))(energy)\n", namespace)
    results = {label: check_case(c, method="central").passed
               for label, c in declared_cases(namespace)}
    assert results == {"right": True, "wrong": False}
    assert namespace["right"] is namespace["wrong"] is namespace["energy"]   # still the cost
