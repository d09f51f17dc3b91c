"""The command line cut short: Ctrl-C (exit 130), a reader that goes away (`| head`),
and notes that must show while a long check runs (LongCheckWarning)."""
import json
import re
import signal
import subprocess
import sys
import textwrap
import time
import warnings

import pytest

from cli_runs import run_check as run

posix_only = pytest.mark.skipif(sys.platform == "win32", reason="signals and pipes")
WAIT = 120    # seconds: only a guard against a hang, never a measurement
# the last line after Ctrl-C in a check; the count is there when the engine knows it
SPENT = r"gradcheck-kit: interrupted while checking {}( \(after \d+ cost evaluations\))?"

TWO_CASES = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    @gk.case(gradient=lambda x: {BUG} * x, params=np.array([0.5, -1.0, 2.0]), method="central")
    def first(x):
        {PRINT}
        return float(np.sum(x ** 2))

    @gk.case(gradient=lambda x: 2 * x, params=np.array([1.0, 2.0]), method="central")
    def second(x):
        return float(np.sum(x ** 2))
""")


def module(folder, name, bug=2, print_line="pass"):
    (folder / name).write_text(TWO_CASES.replace("{BUG}", str(bug))
                               .replace("{PRINT}", print_line))
    return folder / name


def last_line(err):
    return err.strip().splitlines()[-1]


# --- Ctrl-C, raised in-process -------------------------------------------------------------------

def test_ctrl_c_at_import_exits_130_with_one_line_and_a_marked_json(tmp_path, capsys):
    (tmp_path / "slow_import.py").write_text("raise KeyboardInterrupt\n")
    code, out, err = run(capsys, tmp_path / "slow_import.py", "--json", tmp_path / "r.json")
    assert code == 130 and out == ""
    assert err == f"gradcheck-kit: interrupted while importing {tmp_path / 'slow_import.py'}\n"
    data = json.loads((tmp_path / "r.json").read_text())
    assert (data["complete"], data["stopped"], data["passed"], data["checks"]) == \
        (False, "interrupted", False, [])


def test_ctrl_c_at_the_base_point_exits_130_and_lists_the_cases_not_run(tmp_path, capsys):
    path = module(tmp_path, "base.py", print_line="raise KeyboardInterrupt")
    code, _, err = run(capsys, path, "--json", tmp_path / "r.json")
    assert code == 130 and re.fullmatch(SPENT.format("first"), last_line(err)), err
    data = json.loads((tmp_path / "r.json").read_text())
    assert data["stopped"] == "interrupted" and data["not_run"] == ["first", "second"]


def test_ctrl_c_mid_check_prints_and_writes_the_partial_report(tmp_path, capsys):
    (tmp_path / "mid.py").write_text(textwrap.dedent("""
        import numpy as np
        import gradcheck_kit as gk
        calls = [0]

        @gk.case(gradient=lambda x: 2 * x, params=np.ones(30), method="central")
        def long(x):
            calls[0] += 1
            if calls[0] == 45:
                raise KeyboardInterrupt   # as if the user pressed Ctrl-C
            return float(np.sum(x ** 2))

        @gk.case(gradient=lambda x: 2 * x, params=np.ones(2))
        def after(x):
            return float(np.sum(x ** 2))
    """))
    code, out, err = run(capsys, tmp_path / "mid.py", "--json", tmp_path / "r.json")
    assert code == 130 and "== long\nINTERRUPTED" in out and "== after" not in out
    assert (out + err).count("INTERRUPTED") == 1     # the library itself prints nothing
    assert re.fullmatch(SPENT.format("long") + "; the partial report is above", last_line(err))
    data = json.loads((tmp_path / "r.json").read_text())
    assert data["stopped"] == "interrupted" and data["not_run"] == ["after"]
    (check,) = data["checks"]
    assert check["interrupted"] is True and check["as_expected"] is False
    assert 0 < check["report"]["checked"] < 30 and check["report"]["interrupted"] is True


# --- Ctrl-C, a real SIGINT -----------------------------------------------------------------------

SLEEPER = textwrap.dedent("""
    import pathlib, time
    import numpy as np
    import gradcheck_kit as gk

    MARK = pathlib.Path(__file__).with_name("{mark}")
    {at_import}

    @gk.case(gradient=lambda x: 2 * x, params=np.ones(2), method="central")
    def sleeper(x):
        {in_cost}
        return float(np.sum(x ** 2))
""")


def interrupt_when_marked(tmp_path, at_import="", in_cost="pass"):
    """Start the command, wait for the module to mark that it is busy, press Ctrl-C."""
    source = SLEEPER.format(mark="busy.marker", at_import=at_import, in_cost=in_cost)
    (tmp_path / "sleeper.py").write_text(source)
    proc = subprocess.Popen([sys.executable, "-m", "gradcheck_kit", "check", "sleeper.py",
                             "--json", "r.json"], cwd=tmp_path, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + WAIT
    while not (tmp_path / "busy.marker").exists() and proc.poll() is None and \
            time.monotonic() < deadline:
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=WAIT)
    return proc.returncode, out, err, json.loads((tmp_path / "r.json").read_text())


@posix_only
def test_sigint_while_importing(tmp_path):
    code, out, err, data = interrupt_when_marked(
        tmp_path, at_import="MARK.write_text('x'); time.sleep(60)")
    assert code == 130 and err == "gradcheck-kit: interrupted while importing sleeper.py\n"
    assert data["stopped"] == "interrupted"


@posix_only
def test_sigint_during_the_base_point_call(tmp_path):
    code, out, err, data = interrupt_when_marked(
        tmp_path, in_cost="MARK.write_text('x'); time.sleep(60)")
    assert code == 130 and "Traceback" not in err
    assert last_line(err).startswith("gradcheck-kit: interrupted while checking sleeper")
    assert data["stopped"] == "interrupted" and not data["passed"]


# --- a reader that goes away ---------------------------------------------------------------------

def run_with_closed_stdout(folder, *args):
    """Run the command with its stdout a pipe whose reader has already gone."""
    proc = subprocess.Popen([sys.executable, "-m", "gradcheck_kit", "check", *args],
                            cwd=folder, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    proc.stdout.close()
    err = proc.stderr.read()
    proc.wait(timeout=WAIT)
    return proc.returncode, err


@posix_only
def test_a_mismatch_is_never_turned_into_success_by_a_closed_pipe(tmp_path):
    module(tmp_path, "bad_first.py", bug=3)
    code, err = run_with_closed_stdout(tmp_path, "bad_first.py", "--json", "r.json")
    assert code == 1 and "Traceback" not in err
    assert err == "gradcheck-kit: the output closed: 1 of 2 cases not run\n"
    data = json.loads((tmp_path / "r.json").read_text())
    assert (data["complete"], data["stopped"], data["not_run"]) == \
        (False, "output closed", ["second"])
    assert [c["passed"] for c in data["checks"]] == [False]


@posix_only
def test_a_closed_pipe_before_every_case_ran_exits_141_not_0(tmp_path):
    module(tmp_path, "good_first.py", bug=2)
    code, err = run_with_closed_stdout(tmp_path, "good_first.py")
    assert code == 141 and "Traceback" not in err


@posix_only
def test_a_cost_that_prints_is_not_failed_by_a_closed_pipe(tmp_path):
    module(tmp_path, "chatty.py", bug=2, print_line="print('evaluating', x)")
    code, err = run_with_closed_stdout(tmp_path, "chatty.py:first", "--json", "r.json")
    assert code == 0 and "Traceback" not in err
    data = json.loads((tmp_path / "r.json").read_text())
    assert data["complete"] is True and data["checks"][0]["report"]["counts"] == {"agree": 3}


# --- notes while a long check runs ---------------------------------------------------------------

LONG = textwrap.dedent("""
    import warnings
    import numpy as np
    import gradcheck_kit as gk
    from gradcheck_kit.errors import LongCheckWarning

    calls = [0]

    @gk.case(gradient=lambda x: 2 * x, params=np.ones(4), method="central")
    def long(x):
        calls[0] += 1
        if calls[0] == 3:   # as the engine does early in a check it expects to run long
            warnings.warn(LongCheckWarning("this check may take about 2 hours;\\n"
                                           "sample coordinates or use group testing"))
        return float(np.sum(x ** 2))
""")


def test_a_long_check_warning_is_one_line_on_stderr_while_the_check_runs(tmp_path):
    (tmp_path / "long.py").write_text(LONG)
    done = subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", "long.py"],
                          cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                          text=True, timeout=WAIT)
    lines = done.stdout.splitlines()
    note = ("gradcheck-kit: note: this check may take about 2 hours; sample coordinates or "
            "use group testing")
    assert done.returncode == 0 and lines.count(note) == 1, done.stdout
    assert lines.index(note) < lines.index("== long")    # shown before the check ended


def test_the_warning_filters_are_restored(tmp_path, capsys):
    (tmp_path / "long.py").write_text(LONG)
    before = (list(warnings.filters), warnings.showwarning)
    code, _, err = run(capsys, tmp_path / "long.py", "--quiet")
    assert code == 0 and err.count("gradcheck-kit: note: ") == 1
    assert (list(warnings.filters), warnings.showwarning) == before


def test_other_warnings_are_left_to_python(tmp_path, capsys):
    (tmp_path / "warns.py").write_text(textwrap.dedent("""
        import warnings
        import numpy as np
        import gradcheck_kit as gk

        warnings.warn("old option", DeprecationWarning)   # shown or not as Python decides

        @gk.case(gradient=lambda x: 2 * x, params=np.ones(2))
        def fine(x):
            return float(np.sum(x ** 2))
    """))
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        code, _, err = run(capsys, tmp_path / "warns.py", "--quiet")
    assert code == 0 and "gradcheck-kit: note" not in err
    assert [str(w.message) for w in seen if w.category is DeprecationWarning] == ["old option"]


@pytest.fixture(autouse=True)
def _no_temporary_files_left(tmp_path):
    yield
    assert not list(tmp_path.glob(".*.tmp")), "a temporary report file was left behind"


def test_importing_the_main_module_runs_nothing(tmp_path):
    """gradcheck_kit.__main__ imported as a module (pydoc, coverage) runs no command."""
    done = subprocess.run([sys.executable, "-c", "import gradcheck_kit.__main__"],
                          capture_output=True, text=True, timeout=WAIT, cwd=tmp_path)
    assert done.returncode == 0 and done.stdout == "" and done.stderr == ""
