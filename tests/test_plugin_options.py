"""The pytest plugin's session settings, driven by pytester: `--gradient-seed` and the
ini keys gradient_method, gradient_seed and gradient_report (README, "The pytest
plugin"), which command-line option wins over which ini key, and what a bad value gives.

Each inner test module computes its expectation with the library itself, so the
behaviour checked is the plugin's: that the session setting reaches the check.
"""
import json
import textwrap

# The fixture's sampled coordinates depend on the seed; the module asserts that they are
# those of seed EXPECTED (passed in through the file name's placeholder below).
SEEDED_FIXTURE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    X = np.linspace(1.0, 2.0, 20)

    def names(report):
        return sorted(r.name for r in report.rows)

    def test_fixture_uses_the_session_seed(gradient_audit):
        got = gradient_audit.compare(lambda x: np.sum(x ** 2), X, lambda x: 2 * x,
                                     coordinates=3)
        want = gk.compare_gradient(lambda x: np.sum(x ** 2), X, lambda x: 2 * x,
                                   coordinates=3, seed={seed})
        other = gk.compare_gradient(lambda x: np.sum(x ** 2), X, lambda x: 2 * x,
                                    coordinates=3, seed={seed} + 1)
        assert names(want) != names(other)      # the seed decides the sample here
        assert names(got) == names(want)
""")


def seeded(pytester, seed):
    pytester.makepyfile(test_seeded=SEEDED_FIXTURE.format(seed=seed))


def test_gradient_seed_option_reaches_the_fixture(pytester):
    seeded(pytester, 3)
    pytester.runpytest("-p", "no:cacheprovider", "--gradient-seed", "3").assert_outcomes(passed=1)


def test_another_gradient_seed_gives_another_sample(pytester):
    seeded(pytester, 3)
    pytester.runpytest("-p", "no:cacheprovider", "--gradient-seed", "4").assert_outcomes(failed=1)


def test_gradient_seed_ini_key_reaches_the_fixture(pytester):
    seeded(pytester, 5)
    pytester.makeini("[pytest]\ngradient_seed = 5\n")
    pytester.runpytest("-p", "no:cacheprovider").assert_outcomes(passed=1)


def test_gradient_seed_option_wins_over_the_ini_key(pytester):
    seeded(pytester, 3)
    pytester.makeini("[pytest]\ngradient_seed = 5\n")
    pytester.runpytest("-p", "no:cacheprovider", "--gradient-seed", "3").assert_outcomes(passed=1)


def test_a_marker_seed_wins_over_the_session_seed(pytester):
    pytester.makepyfile(test_marked=SEEDED_FIXTURE.format(seed=6).replace(
        "def test_fixture_uses_the_session_seed",
        "import pytest\n\n@pytest.mark.gradient_options(seed=6)\n"
        "def test_fixture_uses_the_session_seed"))
    pytester.runpytest("-p", "no:cacheprovider", "--gradient-seed", "3").assert_outcomes(passed=1)


# A declared case whose params are drawn from a Generator: the session seed decides the
# point.  Its gradient function writes the point it is called at to a file beside it.
DRAWN_CASE = textwrap.dedent("""
    import pathlib

    import numpy as np
    import gradcheck_kit as gk

    SEEN = pathlib.Path(__file__).with_name("points.txt")

    def bowl_gradient(x):
        with SEEN.open("a") as out:
            out.write(" ".join(repr(float(v)) for v in x) + "\\n")
        return 2 * x

    @gk.case(gradient=bowl_gradient, params=lambda rng: rng.uniform(0.5, 2.0, size=3))
    def bowl(x):
        return np.sum(x ** 2)
""")


def drawn_point(pytester, *args):
    seen = pytester.path / "points.txt"
    if seen.exists():
        seen.unlink()
    pytester.runpytest("-p", "no:cacheprovider", *args).assert_outcomes(passed=1)
    return seen.read_text().splitlines()[0]


def test_gradient_seed_fixes_the_drawn_point_of_a_case(pytester):
    pytester.makepyfile(test_drawn=DRAWN_CASE)
    first = drawn_point(pytester, "--gradient-seed", "11")
    assert drawn_point(pytester, "--gradient-seed", "11") == first
    assert drawn_point(pytester, "--gradient-seed", "12") != first
    pytester.makeini("[pytest]\ngradient_seed = 11\n")
    assert drawn_point(pytester) == first


# --- gradient_method and gradient_report as ini keys, and the options over them ---------------
METHOD_MODULE = textwrap.dedent("""
    import numpy as np

    def test_method(gradient_audit):
        r = gradient_audit.compare(lambda x: np.sum(x ** 2), np.ones(2), lambda x: 2 * x)
        assert r.method == "{method}"
""")


def test_gradient_method_option_wins_over_the_ini_key(pytester):
    pytester.makeini("[pytest]\ngradient_method = richardson\n")
    pytester.makepyfile(test_method=METHOD_MODULE.format(method="five-point"))
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-method", "five-point")
    result.assert_outcomes(passed=1)


def test_gradient_report_ini_key_writes_the_session_report(pytester):
    pytester.makeini("[pytest]\ngradient_report = from_ini.json\n")
    pytester.makepyfile(test_method=METHOD_MODULE.format(method="complex-step"))
    pytester.runpytest("-p", "no:cacheprovider").assert_outcomes(passed=1)
    data = json.loads((pytester.path / "from_ini.json").read_text())
    assert data["schema"] == "gradcheck_kit/session-report"
    assert [c["id"].split("::")[-1] for c in data["checks"]] == ["test_method"]
    assert data["checks"][0]["passed"] is True


def test_gradient_report_option_wins_over_the_ini_key(pytester):
    pytester.makeini("[pytest]\ngradient_report = from_ini.json\n")
    pytester.makepyfile(test_method=METHOD_MODULE.format(method="complex-step"))
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "chosen.json")
    result.assert_outcomes(passed=1)
    assert (pytester.path / "chosen.json").exists()
    assert not (pytester.path / "from_ini.json").exists()


# --- bad values: one line naming the setting, pytest's usage-error exit status ------------------
def bad_value_run(pytester, *args, ini=None):
    pytester.makepyfile(test_method=METHOD_MODULE.format(method="complex-step"))
    if ini:
        pytester.makeini(f"[pytest]\n{ini}\n")
    result = pytester.runpytest("-p", "no:cacheprovider", *args)
    return result.ret, result.stdout.str() + result.stderr.str()


def test_a_seed_that_is_not_a_number_is_a_usage_error(pytester):
    code, text = bad_value_run(pytester, "--gradient-seed", "abc")
    assert code == 4 and "--gradient-seed" in text and "abc" in text, text
    assert "Traceback" not in text


def test_an_ini_seed_that_is_not_a_number_is_a_usage_error(pytester):
    code, text = bad_value_run(pytester, ini="gradient_seed = abc")
    assert code == 4 and "gradient_seed" in text and "abc" in text, text
    assert "Traceback" not in text


def test_an_unknown_ini_method_is_a_usage_error(pytester):
    code, text = bad_value_run(pytester, ini="gradient_method = fastest")
    assert code == 4 and "gradient_method" in text and "fastest" in text, text
    assert "Traceback" not in text
