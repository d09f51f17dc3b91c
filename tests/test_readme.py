"""The README stays true: its Quick start has two one-line commands, its Python example
runs and fails the way the text says, and each output block it shows is what the
command beside it prints.

Output blocks are compared by the facts a reader takes from them, not character by
character: verdicts and counts of the summary lines, the method, coordinate names with
their verdicts and analytic / numeric values (4 significant digits), hint kinds with the
names and factors they quote, case and test names, the outcome counts of a pytest run.
Evaluation counts, error estimates and column spacing are left free (they move with
every change of a probe or an error model).  A README block may be abridged: its facts
must appear in the actual output in the same order, with others in between.  The one
exception is the one-line `--quiet` block of the parcel classifier, shown as what the
command prints: it is compared whole, evaluation count included, since a reader runs
that command and compares the line with their own.
"""
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text()

VERDICT = r"(agree|disagree|kink|noisy|non-finite|error)"
NAME = r"([A-Za-z_][\w.]*(?:\[\d+(?:, \d+)*\])?)"
NUMBER = r"([-+]?\d+(?:\.\d+)?(?:e[-+]?\d+)?)"
ROW = re.compile(rf"^\s+{NAME}\s+{VERDICT}\s+{NUMBER}\s+{NUMBER}(\s|$)")
SUMMARY = re.compile(r"^(PASS|FAIL) ")
HINT = re.compile(r"^\s+(?:- |hint: )([\w -]+?): (.*)$")
FAILED_CHECK = re.compile(rf"^(\S+::\S+\]): {NAME} \({VERDICT}\D*{NUMBER}")
OUTCOME = re.compile(r"(\d+ (?:failed|passed|xfailed|skipped|error)"
                     r"(?:, \d+ (?:failed|passed|xfailed|skipped|error))*) in [\d.]+s")


def blocks(text):
    return re.findall(r"```(\w*)\n(.*?)```", text, flags=re.S)


def block_after(phrase):
    """The first fenced block after `phrase` in the README."""
    assert phrase in README, f"the README no longer says {phrase!r}"
    return blocks(README.split(phrase, 1)[1])[0][1]


def significant(value, digits=4):
    return f"{float(value):.{digits - 1}e}"


def summary_fact(line):
    counts = re.search(r"\(([^()]*)\)", line)
    verdicts = tuple(sorted(re.findall(r"(\d+) ([\w-]+)", counts.group(1)))) if counts else ()
    checked = re.search(r"(\d+) of (\d+) coordinates", line)
    method = re.search(r"method ([\w-]+)", line)
    case = re.search(r"\[(\w+)\]\s*$", line)
    return ("summary", line.split()[0], checked and checked.groups(), verdicts,
            method and method.group(1), case and case.group(1))


def line_fact(line):
    """The fact a reader takes from one output line, or None for layout and filler."""
    if SUMMARY.match(line):
        return summary_fact(line)
    if m := ROW.match(line):
        return ("row", m.group(1), m.group(2), significant(m.group(3)), significant(m.group(4)))
    if m := FAILED_CHECK.match(line):
        return ("failed check", m.group(1), m.group(2), m.group(3), significant(m.group(4), 2))
    if m := HINT.match(line):
        rest = m.group(2)
        return ("hint", m.group(1).strip(), tuple(re.findall(r"'([^']+)'", rest)),
                tuple(re.findall(r"(\d+(?:\.\d+)?) times", rest)))
    if line.startswith("== "):
        return ("case", line[3:].strip())
    if re.match(r"^\s+coordinate\s+verdict\s+analytic\s+numeric\b", line):
        return ("table header",)
    if "tolerances that the agreeing coordinates pass" in line:
        return ("suggested tolerances", "rtol=" in line, "atol=" in line)
    if "the mismatch above was expected" in line:
        return ("planted bug expected",)
    if m := re.match(r"^=+ (gradient checks that failed|FAILURES|short test summary info) =+$",
                     line):
        return ("section", m.group(1))
    if m := re.match(r"^_+ (.+?) _+$", line):
        return ("failure title", m.group(1))
    if m := re.match(r"^FAILED (\S+)", line):
        return ("FAILED", m.group(1))
    if m := re.match(r"^([.FxsE]+)\s+\[100%\]$", line):
        return ("progress", m.group(1))
    if m := OUTCOME.search(line):
        return ("outcome", m.group(1))
    return None


def facts(text):
    return [f for f in map(line_fact, text.splitlines()) if f is not None]


def assert_shown_facts_are_produced(shown, produced):
    """Every fact of the README block `shown` appears in `produced`, in the same order."""
    want, got = facts(shown), facts(produced)
    assert want, "no facts read from the README block: has its layout changed?"
    position = 0
    for fact in want:
        try:
            position = got.index(fact, position) + 1
        except ValueError:
            pytest.fail(f"the README shows {fact}, which the output does not give (in this "
                        f"order).\nREADME block:\n{shown}\nactual output:\n{produced}")


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", *args],
                          capture_output=True, text=True, cwd=ROOT)


# --- the parser itself, on lines of known meaning -----------------------------------------------
def test_the_fact_reader_reads_each_kind_of_line():
    summary = ("FAIL gradient check: 1 of 5 coordinates fail (1 disagree); worst relative "
               "error 9e-01; method richardson; 26 evaluations")
    text = textwrap.dedent("""\
        == my_cost
        {summary}
          coordinate  verdict           analytic         numeric  rel error  est error
          W[0, 1]     disagree      6.397000e-01   -7.268620e-01    1.9e+00    1.5e-15
          ...
          hints:
            - factor: at bias the analytic value is 168 times the numeric one
        test_x.py::gradient[c]: b[2] (disagree, rel. error 0.091)
        1 failed, 2 passed in 0.47s
        """).format(summary=summary)
    assert facts(text) == [
        ("case", "my_cost"),
        ("summary", "FAIL", ("1", "5"), (("1", "disagree"),), "richardson", None),
        ("table header",),
        ("row", "W[0, 1]", "disagree", "6.397e-01", "-7.269e-01"),
        ("hint", "factor", (), ("168",)),
        ("failed check", "test_x.py::gradient[c]", "b[2]", "disagree", "9.1e-02"),
        ("outcome", "1 failed, 2 passed")]


def test_a_changed_verdict_or_count_is_caught():
    shown = "FAIL gradient check: 1 of 5 coordinates fail (1 disagree); method complex-step\n"
    produced = "FAIL gradient check: 2 of 5 coordinates fail (2 disagree); method complex-step\n"
    with pytest.raises(pytest.fail.Exception, match="does not give"):
        assert_shown_facts_are_produced(shown, produced)


# --- Quick start ----------------------------------------------------------------------------------
def test_quick_start_has_two_one_line_commands():
    section = README.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = [body for lang, body in blocks(section)][:2]
    assert len(commands) == 2 and all(body.count("\n") == 1 for body in commands)
    assert "gradcheck-kit check examples/" in commands[0] and "pytest" in commands[1]


def test_quick_start_output_block():
    """README block 'The first command prints': the bike-share example's report."""
    done = run_cli("examples/bike_share_demand.py")
    assert done.returncode == 0, done.stdout + done.stderr     # "the command exits 0"
    assert_shown_facts_are_produced(block_after("The first command prints"), done.stdout)


# --- 1. An assertion inside unit tests ----------------------------------------------------------
def readme_assertion_example():
    code = next(body for lang, body in blocks(README) if lang == "python")
    namespace = {}
    exec(compile(code, "README.md", "exec"), namespace)   # raises if the gradient were wrong
    return namespace


def test_the_assertion_example_runs():
    import gradcheck_kit as gk

    namespace = readme_assertion_example()
    report = gk.assert_gradient_matches(namespace["cost"], namespace["params"], namespace["grad"])
    assert report.passed                                   # "returns the report"


def test_the_transposed_gradient_message_block():
    """README block after 'reads:': the GradientMismatchError of the transposed gradient."""
    import gradcheck_kit as gk

    namespace = readme_assertion_example()

    def transposed(p):
        g = namespace["grad"](p)
        return {"W": g["W"].T, "b": g["b"]}
    with pytest.raises(gk.GradientMismatchError) as info:
        gk.assert_gradient_matches(namespace["cost"], namespace["params"], transposed)
    assert isinstance(info.value, AssertionError)
    assert_shown_facts_are_produced(block_after("`AssertionError`, so pytest and unittest show "
                                                "it as a failure) reads:"), str(info.value))


# --- 2. The pytest plugin -------------------------------------------------------------------------
# The module the README describes: "a right case, a case whose gradient has a typo in one
# entry of the dict parameter b, and a test using the fixture".
LOSSES_MODULE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    def loss(p):
        return np.sum(np.sin(p["W"]) ** 2) + np.sum(p["b"] ** 2)

    def right(p):
        return {"W": np.sin(2 * p["W"]), "b": 2 * p["b"]}

    def with_typo(p):
        g = right(p)
        g["b"] = g["b"] * np.array([1.0, 1.0, 1.1])   # the typo: one entry of b
        return g

    P = {"W": np.linspace(0.2, 1.0, 6).reshape(2, 3), "b": np.array([0.5, -1.0, 2.0])}

    @gk.case(gradient=right, params=P)
    def loss_done_right(p):
        return loss(p)

    @gk.case(gradient=with_typo, params=P)
    def loss_with_typo(p):
        return loss(p)

    def test_with_fixture(gradient_audit):
        assert gradient_audit.assert_matches(loss, P, right).passed
""")


def test_the_plugin_output_block(pytester):
    """README block after '`python -m pytest -q` prints (abridged)'."""
    pytester.makepyfile(test_losses=LOSSES_MODULE)
    result = pytester.runpytest("-q", "-p", "no:cacheprovider")
    assert result.ret == 1
    assert_shown_facts_are_produced(block_after("`python -m pytest -q` prints (abridged):"),
                                    result.stdout.str())


# --- 3. A one-off command on a module --------------------------------------------------------
def test_the_quiet_command_block():
    """README block after '--quiet` prints one line per case:' for parcel_classifier.py."""
    done = run_cli("examples/parcel_classifier.py", "--quiet")
    assert done.returncode == 0, done.stdout + done.stderr     # its planted bug is declared
    shown = block_after("`gradcheck-kit check examples/parcel_classifier.py --quiet` prints one "
                        "line per case:")
    assert_shown_facts_are_produced(shown, done.stdout)
    assert len(done.stdout.strip().splitlines()) == len(facts(shown)) == 1
    # the whole line too (see the module docstring): a count that moved shows up here
    assert done.stdout.strip() == shown.strip(), \
        f"the README shows\n{shown.strip()}\nbut the command prints\n{done.stdout.strip()}"


def test_the_full_parcel_report_has_the_hint_the_readme_quotes():
    """README: 'without --quiet the full report, whose hints say `transposed: ...`'."""
    quoted = re.search(r"whose hints say\s+`([^`]+)`", README)
    assert quoted, "the README no longer quotes the parcel classifier's hint"
    done = run_cli("examples/parcel_classifier.py")
    assert_shown_facts_are_produced("    - " + quoted.group(1), done.stdout)
