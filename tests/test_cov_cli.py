"""`gradcheck-kit check/locate` in-process (`cli.main`), for the paths the subprocess tests
of test_cli*.py reach but coverage cannot see: option errors, importing, the explicit
TARGET:COST forms, a reader that goes away, outputs that fail late."""
import json
import textwrap
import warnings

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.cli import main
from cli_runs import run_cli as run

QUADRATIC = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    print("module body ran")
    P = {"W": np.array([[0.5, -1.0], [2.0, 0.25]]), "b": np.array([1.5, -0.5])}

    def cost(p):
        return np.sum(p["W"] ** 2) + np.sum(np.sin(p["b"]))

    def grad(p):
        return {"W": 2 * p["W"], "b": np.cos(p["b"])}
""")


@pytest.fixture
def folder(tmp_path, monkeypatch):
    (tmp_path / "quad.py").write_text(QUADRATIC)
    np.savez(tmp_path / "p.npz", W=np.array([[0.5, -1.0], [2.0, 0.25]]),
             b=np.array([1.5, -0.5]))
    monkeypatch.chdir(tmp_path)
    return tmp_path


# --- option values ---------------------------------------------------------------------

def test_a_seed_that_is_not_an_integer_is_a_usage_error(folder, capsys):
    code, _, err = run(capsys, "check", "quad.py:cost", "--params", "p.npz", "--seed", "abc")
    assert code == 2
    assert "--seed" in err and "expected a seed (an integer >= 0), got 'abc'" in err


@pytest.mark.parametrize("text", ["abc", "nan", "-1e-3"])
def test_a_tolerance_that_is_not_a_finite_nonnegative_number_is_refused(folder, capsys, text):
    code, _, err = run(capsys, "check", "quad.py:cost", "--params", "p.npz", f"--rtol={text}")
    assert code == 2
    assert "--rtol" in err and f"expected a finite number >= 0, got '{text}'" in err


def test_workers_and_scheduler_together_are_refused(folder, capsys):
    code, _, err = run(capsys, "check", "quad.py:cost", "--gradient", "quad.py:grad",
                       "--params", "p.npz", "--workers", "2", "--scheduler", "tcp://x:1")
    assert code == 2 and "--workers and --scheduler: give one or the other" in err


# --- importing the user's code ---------------------------------------------------------

def test_a_folder_as_target_is_refused_by_name(folder, capsys):
    (folder / "losses").mkdir()
    code, _, err = run(capsys, "check", "losses/")
    assert code == 2 and "losses/ is a folder; expected a .py file or a module name" in err


def test_a_file_that_is_not_python_is_refused(folder, capsys):
    (folder / "notes.txt").write_text("def cost(p): return 0\n")
    code, _, err = run(capsys, "check", "./notes.txt")
    assert code == 2 and "cannot import ./notes.txt: expected a .py file" in err


def test_target_and_gradient_in_one_file_run_its_code_once(folder, capsys):
    code, out, _ = run(capsys, "check", "quad.py:cost", "--gradient", "quad.py:grad",
                       "--params", "p.npz")
    assert code == 0 and "PASS" in out
    assert out.count("module body ran") == 1


def test_a_module_named_by_name_and_by_path_is_one_module(folder, capsys):
    code, out, _ = run(capsys, "check", "quad:cost", "--gradient", "quad.py:grad",
                       "--params", "p.npz")
    assert code == 0 and "PASS" in out
    assert out.count("module body ran") == 1


def test_two_files_of_the_same_name_are_both_used(folder, capsys):
    (folder / "a").mkdir()
    (folder / "b").mkdir()
    (folder / "a" / "model.py").write_text("import numpy as np\n"
                                           "def cost(p):\n    return np.sum(p ** 3)\n")
    # the gradient's file has the same name: it must not be taken for the cost's module
    (folder / "b" / "model.py").write_text("def grad(p):\n    return 3 * p ** 2\n")
    np.save(folder / "x.npy", np.array([0.5, -1.25, 2.0]))
    code, out, err = run(capsys, "check", "a/model.py:cost", "--gradient", "b/model.py:grad",
                         "--params", "x.npy")
    assert code == 0 and "PASS" in out, err


def test_a_module_that_needs_a_missing_dependency_names_the_dependency(folder, capsys):
    (folder / "needs_dep.py").write_text("import no_such_dependency_qq\n")
    code, _, err = run(capsys, "check", "needs_dep")
    assert code == 2
    assert "importing needs_dep failed" in err and "no_such_dependency_qq" in err
    assert "no module named 'needs_dep'" not in err


# --- TARGET:COST -----------------------------------------------------------------------

def test_an_undeclared_cost_without_params_asks_for_params(folder, capsys):
    code, _, err = run(capsys, "check", "quad.py:cost")
    assert code == 2 and "--params is needed: cost declares no case with params" in err


def test_a_params_file_lacking_an_array_the_gradient_returns_is_named(folder, capsys):
    np.savez(folder / "only_w.npz", W=np.array([[0.5, -1.0], [2.0, 0.25]]))
    (folder / "w_only.py").write_text(textwrap.dedent("""
        import numpy as np

        def cost(p):
            return np.sum(p["W"] ** 2)

        def grad(p):
            return {"W": 2 * p["W"], "b": np.zeros(2)}
    """))
    code, _, err = run(capsys, "check", "w_only.py:cost", "--gradient", "w_only.py:grad",
                       "--params", "only_w.npz")
    assert code == 2
    assert "--params: only_w.npz lacks 'b', which the gradient returns" in err


def test_a_list_params_file_holding_an_extra_array_is_named(folder, capsys):
    # layers.0 and layers.1 load as a list; the gradient knows only the first layer
    np.savez(folder / "layers.npz", **{"layers.0": np.array([1.0, 2.0]),
                                       "layers.1": np.array([3.0])})
    (folder / "layered.py").write_text(textwrap.dedent("""
        import numpy as np

        def cost(p):
            return float(np.sum(p["layers"][0] ** 2))

        def grad(p):
            return {"layers": [2 * p["layers"][0]]}
    """))
    code, _, err = run(capsys, "check", "layered.py:cost", "--gradient", "layered.py:grad",
                       "--params", "layers.npz")
    assert code == 2
    assert "--params: layers.npz holds 'layers.1', which the gradient does not return" in err
    assert "save only the parameters the cost takes" in err


# --- notes -----------------------------------------------------------------------------

def test_a_long_check_warning_is_printed_as_one_note_line(folder, capsys):
    (folder / "noisy.py").write_text(QUADRATIC + textwrap.dedent("""
        import warnings
        warnings.warn("this check\\n   will take   long", gk.LongCheckWarning)
    """))
    code, _, err = run(capsys, "check", "noisy.py:cost", "--gradient", "noisy.py:grad",
                       "--params", "p.npz")
    assert code == 0
    assert "gradcheck-kit: note: this check will take long\n" in err


def test_the_users_own_warnings_are_left_as_warnings(folder, capsys):
    (folder / "warns.py").write_text(QUADRATIC + textwrap.dedent("""
        import warnings

        def warned_cost(p):
            warnings.warn("cost called in float64", UserWarning)
            return cost(p)
    """))
    with pytest.warns(UserWarning, match="cost called in float64"):
        code, _, err = run(capsys, "check", "warns.py:warned_cost", "--gradient",
                           "warns.py:grad", "--params", "p.npz")
    assert code == 0 and "note: cost called" not in err


# --- locate refuses what group testing cannot do --------------------------------------

def test_locate_refuses_a_vectorized_case(folder, capsys):
    (folder / "vec.py").write_text(textwrap.dedent("""
        import numpy as np
        import gradcheck_kit as gk

        @gk.case(gradient=lambda x: 2 * x, params=np.array([1.0, 2.0]), vectorized=True)
        def batch_cost(xs):
            return np.sum(np.atleast_2d(xs) ** 2, axis=-1)
    """))
    code, _, err = run(capsys, "locate", "vec.py")
    assert code == 2
    assert "has a vectorized cost" in err and "use `gradcheck-kit check`" in err


def test_locate_refuses_a_stochastic_case(folder, capsys):
    (folder / "sampled.py").write_text(textwrap.dedent("""
        import numpy as np
        import gradcheck_kit as gk

        def full(x):
            return np.sum(x ** 2)

        @gk.stochastic_case(params=np.array([1.0, 2.0]), cost=full, max_draws=64)
        def noisy_grad(x, rng):
            return 2 * x + rng.normal(size=x.shape)
    """))
    code, _, err = run(capsys, "locate", "sampled.py")
    assert code == 2
    assert "is a stochastic case" in err and "use `gradcheck-kit check`" in err


# --- a reader that goes away, outputs that fail late ------------------------------------

class _GoneReader:
    """A stdout whose reader has gone: every write and flush raises BrokenPipeError."""

    def write(self, text):
        raise BrokenPipeError(32, "Broken pipe")

    def flush(self):
        raise BrokenPipeError(32, "Broken pipe")

    def fileno(self):
        raise OSError("no file descriptor")


def test_a_closed_output_stops_after_the_first_case_with_status_141(folder, capsys,
                                                                    monkeypatch):
    quiet_module = QUADRATIC.replace('print("module body ran")', "")
    (folder / "two.py").write_text(quiet_module + textwrap.dedent("""
        gk.case(gradient=grad, params=P, name="first")(cost)
        gk.case(gradient=grad, params=P, name="second")(cost)
    """))
    monkeypatch.setattr("sys.stdout", _GoneReader())
    code = main(["check", "two.py", "--json", "run.json"])
    err = capsys.readouterr().err
    assert code == 141
    assert "the output closed: 1 of 2 cases not run" in err and "Traceback" not in err
    data = json.loads((folder / "run.json").read_text())
    assert data["complete"] is False and data["stopped"] == "output closed"
    assert [c["case"] for c in data["checks"]] == ["first"] and data["not_run"] == ["second"]


def test_a_reader_gone_before_the_first_case_runs_none(folder, capsys, monkeypatch):
    # the module prints while imported: that write already finds the reader gone
    (folder / "two.py").write_text(QUADRATIC + textwrap.dedent("""
        gk.case(gradient=grad, params=P, name="first")(cost)
        gk.case(gradient=grad, params=P, name="second")(cost)
    """))
    monkeypatch.setattr("sys.stdout", _GoneReader())
    code = main(["check", "two.py"])
    assert code == 141
    assert "the output closed: 2 of 2 cases not run" in capsys.readouterr().err


def test_a_json_path_that_became_a_folder_during_the_run_is_a_usage_error(folder, capsys):
    # the module's own code takes the path after the command checked it was writable
    (folder / "grabs.py").write_text(QUADRATIC + textwrap.dedent("""
        import os
        os.mkdir("run.json")
    """))
    code, out, err = run(capsys, "check", "grabs.py:cost", "--gradient", "grabs.py:grad",
                         "--params", "p.npz", "--json", "run.json")
    assert code == 2 and "PASS" in out
    assert "--json: run.json is a folder; give a file name in it" in err


def test_a_single_case_figure_is_written_at_the_given_path(folder, capsys):
    pytest.importorskip("matplotlib")
    code, _, _ = run(capsys, "check", "quad.py:cost", "--gradient", "quad.py:grad",
                     "--params", "p.npz", "--plot", "fig.png")
    assert code == 0
    assert (folder / "fig.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in folder.glob("fig*.png")] == ["fig.png"]


def test_the_json_target_is_kept_when_the_run_is_interrupted_while_importing(folder, capsys):
    (folder / "stops.py").write_text("raise KeyboardInterrupt\n")
    code, _, err = run(capsys, "check", "stops.py", "--json", "run.json")
    assert code == 130 and "interrupted while importing stops.py" in err
    data = json.loads((folder / "run.json").read_text())
    assert data["stopped"] == "interrupted" and data["passed"] is False


def test_warnings_filters_are_restored_after_a_run(folder, capsys):
    before = list(warnings.filters)
    run(capsys, "check", "quad.py:cost", "--gradient", "quad.py:grad", "--params", "p.npz")
    assert warnings.filters == before
    assert gk.LongCheckWarning  # the public name the note comes from


SAMPLED = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    def full(x):
        return float(np.sum(x ** 2))

    def grad(x):
        return 2 * x

    @gk.stochastic_case(params=np.array([1.0, 2.0]), cost=full, max_draws=256, seed=4)
    def noisy_grad(x, rng):
        return 2 * x + 0.1 * rng.normal(size=x.shape)   # unbiased: mean 2x
""")


def test_gradient_on_a_stochastic_declaration_is_refused(folder, capsys):
    (folder / "sampled.py").write_text(SAMPLED)
    code, _, err = run(capsys, "check", "sampled.py:noisy_grad", "--gradient", "sampled.py:grad")
    assert code == 2
    assert "--gradient: noisy_grad is declared as a stochastic case, which has no gradient " \
           "to replace; leave --gradient out" in err


def test_params_on_a_stochastic_declaration_check_it_at_those_params(folder, capsys):
    (folder / "sampled.py").write_text(SAMPLED)
    np.save(folder / "far.npy", np.array([-3.0, 0.5, 7.0]))
    code, out, _ = run(capsys, "check", "sampled.py:noisy_grad", "--params", "far.npy",
                       "--json", "run.json")
    assert code == 0 and "PASS" in out
    check, = json.loads((folder / "run.json").read_text())["checks"]
    assert check["expect_mismatch"] is False and check["passed"] is True
    assert len(check["report"]["rows"]) == 3      # the three coordinates of far.npy
