"""Every exit path of `gradcheck-kit check` (more in test_cli_*.py)."""
import json
import re
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from gradcheck_kit.cli import main
from cli_runs import run_check as run

GOOD = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    P = {"W": np.linspace(0.2, 1.0, 6).reshape(2, 3), "b": np.array([0.5, -1.0, 2.0])}

    def loss(p):
        return np.sum(np.sin(p["W"]) ** 2) + np.sum(p["b"] ** 2)

    def loss_grad(p):
        return {"W": np.sin(2 * p["W"]), "b": 2 * p["b"]}

    gk.case(gradient=loss_grad, params=P)(loss)

    def fixed_grad(p):  # a gradient with hard-wired shapes
        return {"W": np.zeros((2, 3)), "b": np.zeros(3)}
""")

BAD = GOOD + textwrap.dedent("""
    def bad_grad(p):
        g = loss_grad(p)
        g["b"] = g["b"] * np.array([1.0, 1.2, 1.0])
        return g

    @gk.case(gradient=bad_grad, params=P)
    def bad_loss(p):
        return loss(p)
""")


@pytest.fixture
def files(tmp_path):
    (tmp_path / "good_mod.py").write_text(GOOD)
    (tmp_path / "bad_mod.py").write_text(BAD)
    (tmp_path / "broken_mod.py").write_text("import numpy\nx = 1 / 0\n")
    (tmp_path / "empty_mod.py").write_text("X = 1\n")
    np.savez(tmp_path / "p.npz", W=np.linspace(0.2, 1.0, 6).reshape(2, 3),
             b=np.array([0.5, -1.0, 2.0]))
    np.savez(tmp_path / "wrong_shape.npz", W=np.zeros((3, 2)), b=np.zeros(3))
    np.save(tmp_path / "pickled.npy", np.array([{"W": 1}], dtype=object), allow_pickle=True)
    (tmp_path / "p.txt").write_text("1 2 3")
    return tmp_path


def test_right_module_exits_0(files, capsys):
    code, out, _ = run(capsys, files / "good_mod.py")
    assert code == 0 and "PASS" in out


def test_wrong_dict_entry_exits_1_and_names_it(files, capsys):
    code, out, _ = run(capsys, files / "bad_mod.py")
    assert code == 1 and "b[1]" in out and "disagree" in out


def test_json_is_written_and_readable(files, capsys):
    target = files / "out.json"
    code, _, _ = run(capsys, files / "bad_mod.py", "--json", target)
    data = json.loads(target.read_text())
    assert code == 1 and data["schema"] == "gradcheck_kit/check-run"
    assert data["schema_version"] == 2 and data["complete"] is True and data["stopped"] is None
    assert data["passed"] is False and data["not_run"] == []
    assert {c["case"]: c["passed"] for c in data["checks"]} == {"loss": True, "bad_loss": False}
    assert {c["case"]: c["as_expected"] for c in data["checks"]} == \
        {"loss": True, "bad_loss": False}
    assert [c["report"]["schema"] for c in data["checks"]] == ["gradcheck_kit/gradient-report"] * 2


def test_cost_gradient_params_form(files, capsys):
    code, out, _ = run(capsys, f"{files / 'good_mod.py'}:loss", "--gradient",
                       f"{files / 'good_mod.py'}:loss_grad", "--params", files / "p.npz",
                       "--json", files / "one.json")
    assert code == 0
    # one case or many: the same document, so a reader needs one code path
    data = json.loads((files / "one.json").read_text())
    assert data["schema"] == "gradcheck_kit/check-run" and data["target"].endswith(":loss")
    assert [c["case"] for c in data["checks"]] == ["loss"] and data["passed"] is True
    assert data["checks"][0]["report"]["schema"] == "gradcheck_kit/gradient-report"
    code, out, _ = run(capsys, f"{files / 'bad_mod.py'}:loss", "--gradient",
                       f"{files / 'bad_mod.py'}:bad_grad", "--params", files / "p.npz")
    assert code == 1 and "b[1]" in out


def test_autograd_when_gradient_is_left_out(files, capsys):
    (files / "ag_mod.py").write_text("import autograd.numpy as np\n"
                                     "def cost(p):\n    return np.sum(np.tanh(p['W'])) + "
                                     "np.sum(p['b'] ** 3)\n")
    code, out, err = run(capsys, f"{files / 'ag_mod.py'}:cost", "--params", files / "p.npz")
    assert code == 0, out + err


@pytest.mark.parametrize("args, words", [
    (["missing_mod.py"], "no such file"),
    (["broken_mod.py"], "ZeroDivisionError: division by zero (broken_mod.py, line 2)"),
    (["empty_mod.py"], "declares no gradient cases"),
    (["good_mod.py:nothing"], "has no name 'nothing'"),
    (["good_mod.py:loss", "--params", "pickled.npy"], "pickled"),
    (["good_mod.py:loss", "--params", "absent.npz"], "no such file"),
    (["good_mod.py:loss", "--params", "p.txt"], ".npz or .npy"),
    (["good_mod.py:loss", "--gradient", "good_mod.py:fixed_grad", "--params", "wrong_shape.npz"],
     "expected shape (3, 2), got (2, 3)"),
    (["good_mod.py", "--params", "p.npz"], "FILE_OR_MODULE:COST"),
    (["good_mod.py:loss", "--gradient", "good_mod.py"], "FILE_OR_MODULE:NAME"),
    (["good_mod.py:P"], "not a function"),
    (["no.such.module"], "no module named"),
    (["good_mod.py", "--workers", "0"],
     "argument --workers: expected a number of processes (an integer >= 1), got '0'"),
])
def test_bad_input_exits_2_with_one_message(files, capsys, monkeypatch, args, words):
    monkeypatch.chdir(files)
    code, out, err = run(capsys, *args)
    assert code == 2 and words in err, err
    assert err.startswith("gradcheck-kit: error:") and err.count("\n") == 1


def test_usage_errors_exit_2_in_one_line(capsys):
    for argv in (["check", "x.py", "--method", "secant"], [], ["check"]):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert err.startswith("gradcheck-kit: error:") and err.count("\n") == 1, err


def test_quiet_prints_one_line_per_check(files, capsys):
    code, out, _ = run(capsys, files / "bad_mod.py", "--quiet")
    lines = out.strip().splitlines()
    assert code == 1 and len(lines) == 2 and lines[1].startswith("FAIL")


def test_process_pool_gives_the_same_verdicts(files, capsys):
    code, out, _ = run(capsys, files / "bad_mod.py", "--workers", "2", "--quiet",
                       "--method", "central")
    code1, out1, _ = run(capsys, files / "bad_mod.py", "--quiet", "--method", "central")
    assert code == code1 == 1 and out == out1


def test_plot_writes_a_figure_per_case(files, capsys):
    code, _, _ = run(capsys, files / "bad_mod.py", "--plot", files / "fig.png")
    assert code == 1
    assert (files / "fig-loss.png").stat().st_size > 10_000
    assert (files / "fig-bad_loss.png").stat().st_size > 10_000


def test_unreachable_scheduler_exits_2(files, capsys):
    code, _, err = run(capsys, files / "good_mod.py", "--scheduler", "tcp://127.0.0.1:9")
    assert code == 2 and "--scheduler" in err


def test_entry_points_and_help(files):
    for cmd in (["gradcheck-kit"], [sys.executable, "-m", "gradcheck_kit"]):
        done = subprocess.run([*cmd, "check", str(files / "bad_mod.py"), "--quiet"],
                              capture_output=True, text=True)
        assert done.returncode == 1 and "FAIL" in done.stdout
    helped = subprocess.run(["gradcheck-kit", "check", "--help"], capture_output=True, text=True)
    assert helped.returncode == 0 and "runs its code" in helped.stdout


def test_ctrl_c_exits_130_after_the_partial_report(files, capsys):
    (files / "slow_mod.py").write_text(textwrap.dedent("""
        import numpy as np
        import gradcheck_kit as gk
        calls = [0]

        @gk.case(gradient=lambda x: 2 * x, params=np.ones(30), method="central")
        def interrupted(x):
            calls[0] += 1
            if calls[0] == 45:   # in the sweep, after the base point and noise lines
                raise KeyboardInterrupt   # as if the user pressed Ctrl-C
            return float(np.sum(x ** 2))
    """))
    code, out, err = run(capsys, files / "slow_mod.py")
    assert code == 130 and "== interrupted\nINTERRUPTED" in out
    assert re.fullmatch(r"gradcheck-kit: interrupted while checking interrupted"
                        r"( \(after \d+ cost evaluations\))?; the partial report is above",
                        err.splitlines()[-1]), err


def test_a_closed_pipe_ends_quietly_and_never_exits_0(files):
    # pipefail: the status is the command's, not head's; bad_mod's second case fails, so
    # the command says 1 (it ran) or 141 (the pipe closed first), never 0
    done = subprocess.run(["bash", "-c", "set -o pipefail; gradcheck-kit check "
                           f"'{files / 'bad_mod.py'}' | head -1"],
                          capture_output=True, text=True)
    assert done.stdout.startswith("== ") and "Traceback" not in done.stderr
    assert done.returncode in (1, 141), done.stderr


def test_scheduler_runs_a_file_module_on_a_dask_cluster(files, capsys):
    """Functions of a module loaded by path are shipped by value, so the workers, which
    cannot import that module, still run them."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        code, out, _ = run(capsys, files / "bad_mod.py", "--scheduler", cluster.scheduler_address,
                           "--method", "central", "--quiet")
    local, out_local, _ = run(capsys, files / "bad_mod.py", "--method", "central", "--quiet")
    assert code == local == 1 and out == out_local


TWICE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    def spread(x):
        return float(np.sum(np.cosh(x)))

    def spread_gradient(x):
        return np.sinh(x)

    def spread_gradient_doubled(x):
        return 2 * np.sinh(x)

    right = gk.case(spread_gradient, params=np.array([0.3, -1.2]))(spread)
    canary = gk.case(spread_gradient_doubled, params=np.array([0.3, -1.2]),
                     expect_mismatch=True)(spread)
""")


def test_two_declarations_on_the_named_cost_are_two_cases(tmp_path, capsys):
    """TARGET:COST reads the module's registry, not only the cost's first declaration."""
    (tmp_path / "twice.py").write_text(TWICE)
    code, out, _ = run(capsys, f"{tmp_path / 'twice.py'}:spread", "--quiet", "--json",
                       tmp_path / "twice.json")
    right, canary = out.strip().splitlines()
    assert code == 0
    assert right.startswith("PASS") and right.endswith("[right]")
    assert canary.startswith("FAIL") and canary.endswith("[canary; planted bug found, as expected]")
    checks = json.loads((tmp_path / "twice.json").read_text())["checks"]
    assert [(c["case"], c["planted_bug"]) for c in checks] == [("right", None),
                                                              ("canary", "found")]
    # an explicit gradient replaces each declaration's own, with no planted-bug expectation
    code, out, _ = run(capsys, f"{tmp_path / 'twice.py'}:spread", "--quiet", "--gradient",
                       f"{tmp_path / 'twice.py'}:spread_gradient")
    assert code == 0 and [line[:4] for line in out.strip().splitlines()] == ["PASS", "PASS"]
    code, out, _ = run(capsys, f"{tmp_path / 'twice.py'}:spread", "--quiet", "--gradient",
                       f"{tmp_path / 'twice.py'}:spread_gradient_doubled")
    assert code == 1 and "planted" not in out
