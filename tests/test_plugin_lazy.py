"""The plugin is loaded in every pytest session of an environment where gradcheck_kit is
installed: a session without gradient checks must not import numpy or the engine
(issue 16: such a session took 1.22 times as long as one with `-p no:gradcheck_kit`).
What a session imported is read from sys.modules at its end, in a fresh process."""
import json
import subprocess
import sys
import textwrap

from gradcheck_kit import cases, plan, pytest_plugin

# Written at the very end of the session, after every hook of the plugin has run.
RECORDER = textwrap.dedent("""
    import json, sys

    def pytest_unconfigure(config):
        names = ("numpy", "gradcheck_kit.pipeline", "gradcheck_kit.cases",
                 "gradcheck_kit.pytest_plugin")
        with open("modules.json", "w") as f:
            json.dump({n: n in sys.modules for n in names}, f)
""")


def imported(pytester) -> dict:
    pytester.makeconftest(RECORDER)
    result = pytester.runpytest_subprocess("-p", "no:cacheprovider")
    assert result.ret == 0, result.stdout.str()
    return json.loads((pytester.path / "modules.json").read_text())


def test_a_session_without_gradient_checks_imports_no_numpy_and_no_engine(pytester):
    pytester.makepyfile(test_plain="def test_sum():\n    assert sum([1, 2]) == 3\n")
    found = imported(pytester)
    assert found["gradcheck_kit.pytest_plugin"]          # the plugin was loaded
    assert not found["numpy"] and not found["gradcheck_kit.pipeline"] \
        and not found["gradcheck_kit.cases"], found


def test_a_declared_case_loads_the_engine_when_collected(pytester):
    pytester.makepyfile(test_cube=textwrap.dedent("""
        import numpy as np
        import gradcheck_kit as gk

        cube = gk.case(lambda x: 3 * x ** 2, params=np.ones(2))(lambda x: np.sum(x ** 3))
    """))
    found = imported(pytester)
    assert found["numpy"] and found["gradcheck_kit.pipeline"] and found["gradcheck_kit.cases"]


def test_the_fixture_loads_the_engine_on_first_use(pytester):
    pytester.makepyfile(test_fixture=textwrap.dedent("""
        def test_square(gradient_audit):
            import sys
            assert "gradcheck_kit.pipeline" not in sys.modules     # not before its use
            report = gradient_audit.compare(lambda x: x * x, 1.5, lambda x: 2 * x)
            assert report.passed
    """))
    found = imported(pytester)
    assert found["gradcheck_kit.pipeline"]


def test_import_gradcheck_kit_alone_imports_no_numpy():
    code = ("import sys, gradcheck_kit as gk; print('numpy' in sys.modules); "
            "gk.compare_gradient; print('numpy' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "True"]                      # imported on first use of a name


def test_the_plugins_copies_of_constants_match_their_sources():
    assert pytest_plugin.REGISTRY == cases.REGISTRY
    assert pytest_plugin.METHOD_CHOICES == plan.METHOD_CHOICES
