"""The pytest plugin's failures read as one plain message or the report, never as pytest's,
pluggy's or the plugin's own frames; its options are usage errors when they cannot be used;
a strategy case reports each distinct failure at its shrunk point.

The costs and data here are invented (a tank-level model, a lookup table).
"""
import json
import re
import textwrap

import pytest

HEADER = textwrap.dedent("""
    import numpy as np
    import pytest
    import gradcheck_kit as gk

    def level(x):
        return float(np.sum(x ** 2))

    def level_gradient(x):
        return 2 * x
""")

# one failing case per module: (body, the plain sentence the failure must show, a line of
# the user's own code the failure must show, or None)
BROKEN = {
    "params function raises": ("""
        def load_reading(rng):
            raise OSError("sensor table missing")

        tank = gk.case(level_gradient, params=load_reading)(level)
        """, "params: the params function 'load_reading' (called with a numpy Generator) "
             "raised OSError: sensor table missing", 'raise OSError("sensor table missing")'),
    "cost raises": ("""
        def diverging(x):
            raise RuntimeError("solver diverged")

        tank = gk.case(level_gradient, params=np.ones(3))(diverging)
        """, "cost raised RuntimeError at the base point: solver diverged",
        'raise RuntimeError("solver diverged")'),
    "gradient is a number": ("""
        tank = gk.case(3.0, params=np.ones(3))(level)
        """, "gradient for parameter 'x': expected shape (3,), got ()", None),
    "gradient of the wrong structure": ("""
        tank = gk.case(lambda x: {"inflow": x}, params=np.ones(3))(level)
        """, "gradient has a different structure from params", None),
    "unknown method in a marker": ("""
        pytestmark = pytest.mark.gradient_options(method="centre")
        tank = gk.case(level_gradient, params=np.ones(3))(level)
        """, "gradient_options marker: method: expected one of", None),
}

INTERNALS = ("pluggy", "_pytest", "pytest_plugin.py", "gradcheck_kit/pipeline.py",
             "gradcheck_kit/cases.py", "Traceback (most recent call last)")


def internals_in(text):
    """The internal names seen below pytest's header (whose plugin line names pluggy)."""
    body = text.split("\ncollect", 1)[1]
    return [word for word in INTERNALS if word in body]


def failure_section(text):
    return text.split(" FAILURES ", 1)[1].split("gradient checks that failed")[0]


@pytest.mark.parametrize("scenario", sorted(BROKEN))
def test_a_case_that_cannot_run_shows_one_plain_message(pytester, scenario):
    body, sentence, user_line = BROKEN[scenario]
    pytester.makepyfile(test_tank=HEADER + textwrap.dedent(body))
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(failed=1)
    text = result.stdout.str()
    section = failure_section(text)
    assert len(section.strip().splitlines()) <= 25, section
    assert not internals_in(text), section
    assert "_ gradient[tank] _" in section               # the item's own name as header
    assert f"the check could not run: {sentence}" in section
    if user_line is not None:                              # the user's frame, and only that
        assert user_line in section and "test_tank.py" in section
    summary = text.split("gradient checks that failed", 1)[1]
    assert "test_tank.py::gradient[tank]: could not run:" in summary


def test_a_string_params_fails_at_the_declaration_in_one_line(pytester):
    pytester.makepyfile(test_tank=HEADER + "tank = gk.case(level_gradient, params='abc')(level)\n")
    result = pytester.runpytest("-p", "no:cacheprovider")
    assert result.ret == 2                                  # a collection error
    text = result.stdout.str()
    assert not internals_in(text), text
    assert len(text.strip().splitlines()) <= 25, text
    assert "case: params: expected a structure of arrays or floats" in text
    assert "got a str ('abc')" in text


@pytest.mark.parametrize("args, ini, message", [
    (["--gradient-method", "centre"], "",
     "ERROR: --gradient-method: expected one of 'forward', "),
    (["--gradient-seed", "-1"], "", "ERROR: --gradient-seed: expected an int >= 0, got -1"),
    (["--gradient-seed", "1.5"], "", "ERROR: --gradient-seed: expected an int >= 0, got '1.5'"),
    ([], "gradient_seed = abc", "ERROR: ini gradient_seed: expected an int >= 0, got 'abc'"),
    ([], "gradient_method = fast", "ERROR: ini gradient_method: expected one of "),
    (["--gradient-report", "no_such_folder/checks.json"], "",
     "ERROR: --gradient-report: the folder "),
    (["--gradient-report", "."], "", "ERROR: --gradient-report: "),
])
def test_options_that_cannot_be_used_are_usage_errors_at_the_start(pytester, args, ini,
                                                                   message):
    if ini:
        pytester.makeini(f"[pytest]\n{ini}\n")
    pytester.makepyfile(test_tank=HEADER + "tank = gk.case(level_gradient, "
                                           "params=np.ones(3))(level)\n")
    result = pytester.runpytest("-p", "no:cacheprovider", *args)
    assert result.ret == 4                                  # pytest's usage-error status
    lines = [line for line in result.stderr.lines if line.strip()]
    assert len(lines) == 1 and lines[0].startswith(message), result.stderr.str()
    assert "passed" not in result.stdout.str() and "failed" not in result.stdout.str()


def test_good_options_still_reach_the_checks(pytester):
    pytester.makeini("[pytest]\ngradient_seed = 7\n")
    pytester.makepyfile(test_tank=HEADER + textwrap.dedent("""
        def test_seed_and_method(gradient_audit):
            r = gradient_audit.compare(level, np.ones(40), level_gradient, coordinates=2)
            assert r.method == "five-point" and len(r.rows) == 2
    """))
    pytester.runpytest("-p", "no:cacheprovider", "--gradient-method",
                       "five-point").assert_outcomes(passed=1)


DRAWN = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk
    from gradcheck_kit import strategies as gst

    def wrong_for_negatives(x):
        return x * np.abs(x) + 1  # d/dx (x^3 / 3 + x) is x^2 + 1: right only where x >= 0

    @gk.case(gradient=wrong_for_negatives, method="central",
             params=gst.points((2,), smallest=0.5, largest=5))
    def table_cost(x):
        if x[0] > 3:
            raise FloatingPointError("lookup past the end of the table")
        if x[1] < -2:
            raise ZeroDivisionError("empty bin")
        return np.sum(x ** 3) / 3 + np.sum(x)
""")


def test_a_strategy_case_shows_one_report_per_distinct_failure_each_shrunk(pytester):
    pytester.makepyfile(test_drawn=DRAWN)
    result = pytester.runpytest("-p", "no:cacheprovider", "--gradient-report", "s.json")
    result.assert_outcomes(failed=1)
    (entry,) = json.loads((pytester.path / "s.json").read_text())["checks"]
    failures = entry["drawn"]["failures"]
    assert [f["report"] is not None for f in failures] == [True, False, False]
    assert "empty bin" in failures[2]["error"] and entry["report"]["counts"]["disagree"] == 1
    text = result.stdout.str()
    section = failure_section(text)
    assert "ExceptionGroup" not in text and "Falsifying example" not in text
    assert not internals_in(text), section
    assert "3 distinct failures at points drawn from the strategy" in section
    assert len(section.strip().splitlines()) <= 40, section
    points = re.findall(r"failing point \(shrunk by hypothesis\): array\(\[(.*?)\]\)", section)
    assert len(points) == 3, section
    values = [[float(v) for v in p.split(",")] for p in points]
    mismatch, lookup, empty = values
    assert "1 of 2 coordinates fail" in section               # the report of the mismatch
    # shrunk: only the entry that shows the failure is away from the simplest value, 0
    assert sum(v < 0 for v in mismatch) == 1 and 0.0 in mismatch
    assert lookup[0] > 3 and lookup[1] == 0
    assert empty[1] < -2 and empty[0] == 0
    assert "cost raised FloatingPointError at the base point: lookup past the end" in section
    assert "cost raised ZeroDivisionError at the base point: empty bin" in section
    summary = text.split("gradient checks that failed", 1)[1]
    assert summary.count("test_drawn.py::gradient[table_cost] (failure") == 3


def test_an_unexpected_error_shows_its_frames_but_not_the_test_runners(pytester):
    # a stand-in for a bug inside gradcheck_kit: the core raises something it never should
    pytester.makeconftest(textwrap.dedent("""
        import gradcheck_kit.cases

        def broken_core(*args, **options):
            raise TypeError("an internal slip")

        gradcheck_kit.cases.compare_gradient = broken_core
    """))
    pytester.makepyfile(test_tank=HEADER + "tank = gk.case(level_gradient, "
                                           "params=np.ones(3))(level)\n")
    result = pytester.runpytest_subprocess("-p", "no:cacheprovider")   # the patch stays there
    result.assert_outcomes(failed=1)
    section = failure_section(result.stdout.str())
    assert "the check stopped with TypeError: an internal slip" in section
    assert "conftest.py" in section and 'raise TypeError("an internal slip")' in section
    assert "gradcheck_kit/cases.py" in section           # our frames stay: it is our bug
    assert not [w for w in ("pluggy", "_pytest", "pytest_plugin.py") if w in section], section
    assert len(section.strip().splitlines()) <= 25, section
