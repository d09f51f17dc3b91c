"""The pytest plugin, driven by pytest's own pytester."""
import json
import subprocess
import sys
import textwrap

import numpy as np

MODULE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    def loss(p):
        return np.sum(np.sin(p["W"]) ** 2) + np.sum(p["b"] ** 2)

    def right(p):
        return {"W": np.sin(2 * p["W"]), "b": 2 * p["b"]}

    def wrong(p):
        g = right(p)
        g["b"] = g["b"] * np.array([1.0, 1.0, 1.1])   # one dict entry wrong
        return g

    P = {"W": np.linspace(0.2, 1.0, 6).reshape(2, 3), "b": np.array([0.5, -1.0, 2.0])}

    good_loss = gk.case(gradient=right, params=P)(lambda p: loss(p))
    good_loss.__name__ = "good_loss"

    @gk.case(gradient=wrong, params=P)
    def bad_loss(p):
        return loss(p)

    def test_with_fixture(gradient_audit):
        report = gradient_audit.assert_matches(loss, P, right)
        assert report.passed
""")


def test_right_wrong_and_fixture_give_one_failure_two_passes(pytester):
    pytester.makepyfile(test_losses=MODULE)
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "checks.json")
    result.assert_outcomes(passed=2, failed=1)
    assert result.ret == 1
    result.stdout.fnmatch_lines(["*gradient*bad_loss*", "*b?2?*disagree*"])  # ? : [ is a class
    text = result.stdout.str()
    assert "gradient checks that failed" in text and "b[2] (disagree" in text
    assert "pytest_plugin.py" not in text.split("short test summary")[0].split("FAILURES")[-1]
    assert "_ gradient[bad_loss] _" in text            # the failure header is the item's name
    data = json.loads((pytester.path / "checks.json").read_text())
    assert (data["schema"], data["schema_version"]) == ("gradcheck_kit/session-report", 2)
    assert data["title"] == "gradient checks of a pytest session"
    ids = {c["id"].split("::")[-1]: (c["kind"], c["passed"]) for c in data["checks"]}
    assert ids == {"gradient[good_loss]": ("case", True), "gradient[bad_loss]": ("case", False),
                   "test_with_fixture": ("fixture", True)}
    bad = next(c for c in data["checks"] if c["id"].endswith("gradient[bad_loss]"))
    assert bad["report"]["schema"] == "gradcheck_kit/gradient-report" and bad["error"] is None
    assert bad["text"].startswith("FAIL ") and bad["drawn"] is None


ASSERTING = textwrap.dedent("""
    import numpy as np
    import pytest
    import gradcheck_kit as gk

    def drag(v):
        return float(np.sum(v ** 2 * np.abs(v)))

    def drag_gradient_missing_abs(v):
        return 3 * v ** 2          # right only where v >= 0: d/dv v^2 |v| = 3 v |v|

    V = np.array([0.5, -2.0, 1.5])

    def test_asserts_a_wrong_gradient():
        gk.assert_gradient_matches(drag, V, drag_gradient_missing_abs)

    def test_expects_the_mismatch():
        with pytest.raises(gk.GradientMismatchError):
            gk.assert_gradient_matches(drag, V, drag_gradient_missing_abs)

    @pytest.mark.xfail(reason="known bug", strict=True)
    def test_known_bug():
        gk.assert_gradient_matches(drag, V, drag_gradient_missing_abs)
""")


def test_failed_assertions_in_ordinary_tests_are_listed_and_reported(pytester):
    pytester.makepyfile(test_drag=ASSERTING)
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "s.json")
    result.assert_outcomes(passed=1, failed=1, xfailed=1)
    summary = result.stdout.str().split("gradient checks that failed", 1)[1]
    summary = summary.split("short test summary")[0]
    # only the assertion that failed its test: not the one caught, not the expected failure
    assert "test_drag.py::test_asserts_a_wrong_gradient: x[1] (disagree" in summary
    assert "test_expects_the_mismatch" not in summary and "test_known_bug" not in summary
    checks = json.loads((pytester.path / "s.json").read_text())["checks"]
    assert [(c["id"].split("::")[-1], c["kind"], c["passed"]) for c in checks] == [
        ("test_asserts_a_wrong_gradient", "assertion", False)]
    assert checks[0]["report"]["counts"]["disagree"] == 1


def test_the_plugin_keeps_no_report_alive_after_its_test(pytester):
    """The session keeps what it prints, not the reports (which hold the cost, its runner
    and base vector): a large cost object is freed once its test is done."""
    pytester.makepyfile(test_memory=textwrap.dedent("""
        import gc
        import weakref
        import numpy as np

        class Cost:                        # stands for a model holding a large data set
            def __call__(self, x):
                return float(np.sum(x ** 2))

        seen = []

        def test_check(gradient_audit):
            cost = Cost()
            seen.append(weakref.ref(cost))
            assert gradient_audit.compare(cost, np.ones(3), lambda x: 2 * x,
                                          method="central").passed

        def test_the_cost_is_gone():
            gc.collect()
            assert seen and seen[0]() is None
    """))
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "s.json")
    result.assert_outcomes(passed=2)


def test_item_ids_are_stable_and_readable(pytester):
    pytester.makepyfile(test_losses=MODULE)
    result = pytester.runpytest("--collect-only", "-q", "-p", "no:cacheprovider")
    result.stdout.fnmatch_lines(["test_losses.py::gradient?good_loss?",
                                 "test_losses.py::gradient?bad_loss?",
                                 "test_losses.py::test_with_fixture"])


def test_method_option_and_marker_reach_the_checks(pytester):
    pytester.makepyfile(test_opts=textwrap.dedent("""
        import numpy as np
        import pytest

        def cost(x):
            return float(np.sum(np.cos(x)))   # real-only: auto would pick richardson

        def test_session_method(gradient_audit):
            assert gradient_audit.compare(cost, np.ones(3), lambda x: -np.sin(x)).method \\
                == "central"

        @pytest.mark.gradient_options(method="five-point")
        def test_marker_method(gradient_audit):
            assert gradient_audit.compare(cost, np.ones(3), lambda x: -np.sin(x)).method \\
                == "five-point"
    """))
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-method", "central")
    result.assert_outcomes(passed=2)


def test_ini_keys(pytester):
    pytester.makeini("[pytest]\ngradient_method = richardson\n")
    pytester.makepyfile(test_ini=textwrap.dedent("""
        import numpy as np

        def test_ini_method(gradient_audit):
            r = gradient_audit.compare(lambda x: np.sum(x ** 2), np.ones(2), lambda x: 2 * x)
            assert r.method == "richardson"
    """))
    pytester.runpytest("-p", "no:cacheprovider").assert_outcomes(passed=1)


def test_strategy_case_finds_a_bug_for_negative_inputs_and_shows_the_shrunk_point(pytester):
    pytester.makepyfile(test_drawn=textwrap.dedent("""
        import numpy as np
        import gradcheck_kit as gk
        from gradcheck_kit import strategies as gst

        def wrong_for_negatives(x):
            return 2 * x          # d/dx (x |x|) is 2 |x|: right only where x >= 0

        @gk.case(gradient=wrong_for_negatives, params=gst.points((2,), smallest=0.5, largest=5))
        def signed_square(x):
            return np.sum(x * np.abs(x))
    """))
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(failed=1)
    text = result.stdout.str()
    assert "failing point (shrunk by hypothesis)" in text
    line = next(s for s in text.splitlines() if "failing point" in s)
    point = np.array(eval(line.split(":", 1)[1].strip().replace("array", "")))
    # shrunk: one negative entry is enough to show the bug, the other goes to 0
    assert np.sum(point < 0) == 1 and np.sum(point != 0) == 1, line


def test_library_use_imports_neither_pytest_nor_hypothesis():
    code = ("import sys, numpy as np, gradcheck_kit as gk\n"
            "gk.compare_gradient(lambda x: np.sum(x**2), np.ones(3), lambda x: 2*x)\n"
            "gk.case(params=np.ones(2))(lambda x: np.sum(x))\n"
            "bad = [m for m in ('pytest', 'hypothesis') if m in sys.modules]\n"
            "assert not bad, bad\n")
    subprocess.run([sys.executable, "-c", code], check=True)


FIXTURE_CANARY = MODULE.split("good_loss = ")[0] + textwrap.dedent("""
    def test_confirms_the_bug_is_caught(gradient_audit):
        assert not gradient_audit.compare(loss, P, wrong).passed

    def test_relies_on_a_wrong_gradient(gradient_audit):
        assert gradient_audit.compare(loss, P, wrong).passed
""")


def test_the_fixture_lists_a_failed_check_only_when_its_test_fails(pytester):
    pytester.makepyfile(test_canary=FIXTURE_CANARY)
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "s.json")
    result.assert_outcomes(passed=1, failed=1)
    summary = result.stdout.str().split("gradient checks that failed", 1)[1]
    summary = summary.split("short test summary")[0]
    assert "test_canary.py::test_relies_on_a_wrong_gradient: b[2] (disagree" in summary
    assert "test_confirms_the_bug_is_caught" not in summary
    checks = json.loads((pytester.path / "s.json").read_text())["checks"]   # both kept
    assert [(c["id"].split("::")[-1], c["kind"], c["passed"]) for c in checks] == [
        ("test_confirms_the_bug_is_caught", "fixture", False),
        ("test_relies_on_a_wrong_gradient", "fixture", False)]


def test_the_fixture_names_the_nearest_option_for_a_misspelt_one(pytester):
    pytester.makepyfile(test_typo=MODULE.split("good_loss = ")[0] + textwrap.dedent("""
        def test_typo(gradient_audit):
            gradient_audit.compare(loss, P, right, seeed=3)
    """))
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(failed=1)
    result.stdout.fnmatch_lines(["*gradient_audit: unknown option 'seeed'; did you mean 'seed'?*"])
