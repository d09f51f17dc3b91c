"""The pytest plugin in-process (pytester.runpytest), for what users see in the paths the
subprocess tests take: help with a bad ini, planted bugs found or missed, errors raised
in the user's cost, the fixture's and the assertion's failures, a session report that
cannot be written at the end."""
import json
import textwrap

import pytest

# pytester's in-process runs drop the modules first imported inside them, while the package
# keeps the names it imported lazily: load the engine's modules here, before any run, so
# that every run's declarations and the plugin's registry use the same classes.
from gradcheck_kit import (assertions, cases, pipeline, stochastic,  # noqa: F401
                           pytest_plugin)

HEAD = textwrap.dedent("""
    import numpy as np
    import pytest
    import gradcheck_kit as gk

    X = np.array([0.5, -1.25, 2.0])

    def cubic(x):
        return float(np.sum(x ** 3))

    def cubic_grad(x):
        return 3 * x ** 2

    def cubic_grad_wrong(x):
        g = 3 * x ** 2
        g[1] *= 1.5
        return g
""")


def _run(pytester, source, *args):
    pytester.makepyfile(HEAD + textwrap.dedent(source))   # named after the test: no clash
    return pytester.runpytest("-p", "no:cacheprovider", *args)


def _summary(result) -> str:
    text = result.stdout.str()
    _, _, after = text.partition("gradient checks that failed")
    return after.partition("short test summary info")[0]


def test_help_lists_the_options_even_with_a_bad_ini(pytester):
    pytester.makeini("[pytest]\ngradient_seed = minus three\n")
    result = pytester.runpytest("--help")
    assert result.ret == 0
    out = result.stdout.str()
    assert "--gradient-seed" in out and "--gradient-report" in out and "--gradient-method" in out


def test_a_planted_bug_that_is_found_is_an_expected_failure(pytester):
    result = _run(pytester, """
        gk.case(gradient=cubic_grad_wrong, params=X, expect_mismatch=True)(cubic)
    """)
    result.assert_outcomes(xfailed=1)
    assert "planted bug found, as declared" in result.stdout.str() or result.ret == 0


def test_a_planted_bug_that_is_not_found_fails_and_says_so(pytester):
    result = _run(pytester, """
        gk.case(gradient=cubic_grad, params=X, expect_mismatch=True)(cubic)
    """, "--gradient-report", "session.json")
    result.assert_outcomes(failed=1)
    assert "the planted bug was not found" in _summary(result)
    check, = json.loads((pytester.path / "session.json").read_text())["checks"]
    assert check["expect_mismatch"] is True and check["passed"] is True
    assert check["as_expected"] is False


def test_an_error_in_the_users_cost_shows_the_users_line(pytester):
    result = _run(pytester, """
        def broken(x):
            scale = {"a": 1.0}
            return float(np.sum(x)) * scale["b"]

        gk.case(gradient=cubic_grad, params=X)(broken)
    """)
    result.assert_outcomes(failed=1)
    out = result.stdout.str()
    assert "the check could not run" in out and "KeyError" in out
    assert "the error was raised here:" in out
    assert 'scale["b"]' in out                     # the user's own line
    assert "_pytest" not in out.partition("the error was raised here:")[2].split("====")[0]
    assert "could not run" in _summary(result)


def test_the_fixtures_mismatch_is_listed_once(pytester):
    result = _run(pytester, """
        def test_cubic(gradient_audit):
            gradient_audit.assert_matches(cubic, X, cubic_grad_wrong)
    """, "--gradient-report", "session.json")
    result.assert_outcomes(failed=1)
    summary = _summary(result)
    assert summary.count("test_cubic") == 1 and "x[1]" in summary and "disagree" in summary
    check, = json.loads((pytester.path / "session.json").read_text())["checks"]
    assert check["kind"] == "fixture" and check["passed"] is False


def test_a_plain_assertion_mismatch_is_listed_as_an_assertion(pytester):
    result = _run(pytester, """
        def test_cubic():
            gk.assert_gradient_matches(cubic, X, cubic_grad_wrong)
    """, "--gradient-report", "session.json")
    result.assert_outcomes(failed=1)
    assert "test_cubic" in _summary(result) and "x[1]" in _summary(result)
    check, = json.loads((pytester.path / "session.json").read_text())["checks"]
    assert check["kind"] == "assertion" and check["passed"] is False


def test_a_mismatch_under_xfail_is_not_listed(pytester):
    result = _run(pytester, """
        @pytest.mark.xfail(reason="known wrong", strict=True)
        def test_cubic():
            gk.assert_gradient_matches(cubic, X, cubic_grad_wrong)
    """, "--gradient-report", "session.json")
    result.assert_outcomes(xfailed=1)
    assert "gradient checks that failed" not in result.stdout.str()
    assert json.loads((pytester.path / "session.json").read_text())["checks"] == []


def test_a_session_report_whose_folder_went_away_is_said_at_the_end(pytester):
    (pytester.path / "out").mkdir()
    result = _run(pytester, """
        import shutil

        def test_cubic(gradient_audit):
            gradient_audit.assert_matches(cubic, X, cubic_grad)
            shutil.rmtree("out")
    """, "--gradient-report", "out/session.json")
    result.assert_outcomes(passed=1)
    assert "gradcheck_kit: could not write the session report" in result.stdout.str()
    assert "out/session.json" in result.stdout.str()


def test_a_failing_stochastic_case_gives_its_relative_bias(pytester):
    result = _run(pytester, """
        @gk.stochastic_case(params=X, cost=cubic, max_draws=256, seed=3)
        def biased(x, rng):
            return 1.5 * cubic_grad(x) + 0.01 * rng.normal(size=x.shape)
    """)
    result.assert_outcomes(failed=1)
    assert "rel. bias" in _summary(result)


def test_a_cost_that_fails_the_test_itself_shows_pytests_own_failure(pytester):
    result = _run(pytester, """
        def refuses(x):
            pytest.fail("cost refused the point on purpose")

        gk.case(gradient=cubic_grad, params=X)(refuses)
    """)
    result.assert_outcomes(failed=1)
    assert "cost refused the point on purpose" in result.stdout.str()


@pytest.mark.parametrize("seed", ["-1", "1.5"])
def test_a_seed_in_the_ini_that_cannot_be_used_stops_the_session(pytester, seed):
    pytester.makeini(f"[pytest]\ngradient_seed = {seed}\n")
    result = _run(pytester, "def test_nothing():\n    pass\n")
    assert result.ret == pytest.ExitCode.USAGE_ERROR
    assert "ini gradient_seed: expected an int >= 0" in result.stderr.str()


def test_an_unexpected_error_in_process_names_the_error_and_keeps_our_frames(pytester,
                                                                            monkeypatch):
    # a stand-in for a bug inside gradcheck_kit; monkeypatch undoes it after this test
    def broken_core(*args, **options):
        raise TypeError("an internal slip")

    monkeypatch.setattr(cases, "compare_gradient", broken_core)
    result = _run(pytester, """
        gk.case(gradient=cubic_grad, params=X)(cubic)
    """, "--gradient-report", "session.json")
    result.assert_outcomes(failed=1)
    text = result.stdout.str()
    section = text.split(" FAILURES ", 1)[1].split("gradient checks that failed")[0]
    assert "the check stopped with TypeError: an internal slip" in section
    assert "(an object gradcheck_kit cannot handle, or a bug in gradcheck_kit)" in section
    assert 'raise TypeError("an internal slip")' in section
    assert "_pytest" not in section and "pluggy" not in section
    assert "could not run: TypeError: an internal slip" in _summary(result)
    check, = json.loads((pytester.path / "session.json").read_text())["checks"]
    assert check["error"] == "TypeError: an internal slip" and check["as_expected"] is False
