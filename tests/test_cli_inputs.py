"""The command line's inputs: importing the user's code once and as `python -m` does,
one exact sentence for each bad input, params files (nested names), the options the
README lists, naming coordinates, planted-bug marks, --version and `locate`."""
import json
import sys
import textwrap
from importlib.metadata import version as installed_version

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.cli import coordinates_option, main
from cli_runs import run_cli as run

# A line fit's mean squared error and its gradient (common practice, no source).
LINE_FIT = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    X = np.array([0.0, 1.0, 2.0, 3.0])
    Y = np.array([1.0, 2.9, 5.2, 7.1])
    P = {"w": np.array([1.5]), "b": 0.5}

    def mse(p):
        r = p["w"][0] * X + p["b"] - Y
        return float(np.mean(r ** 2))

    def mse_grad(p):
        r = p["w"][0] * X + p["b"] - Y
        return {"w": np.array([2 * np.mean(r * X)]), "b": float(2 * np.mean(r))}

    def mse_grad_off(p):   # 1e-5 too large in w: a small relative error
        g = mse_grad(p)
        g["w"] = g["w"] * (1 + 1e-5)
        return g

    def mse_grad_tiny(p):  # 1e-9 off in b, an absolute error at a tiny scale
        g = mse_grad(p)
        g["b"] = g["b"] + 1e-9
        return g

    gk.case(gradient=mse_grad, params=P)(mse)
    NOT_CALLABLE = 3
""")

# A two-layer model with nested params; the second layer's bias gradient is doubled.
NESTED = textwrap.dedent("""
    import numpy as np

    def cost(p):
        h = np.tanh(p["layer1"]["W"] @ np.array([0.5, -1.0]) + p["layer1"]["b"])
        return float(np.sum((p["layer2"]["W"] @ h + p["layer2"]["b"]) ** 2))

    def grad(p, bug=1.0):
        x = np.array([0.5, -1.0])
        h = np.tanh(p["layer1"]["W"] @ x + p["layer1"]["b"])
        out = p["layer2"]["W"] @ h + p["layer2"]["b"]
        d_out = 2 * out
        d_h = (p["layer2"]["W"].T @ d_out) * (1 - h ** 2)
        return {"layer1": {"W": np.outer(d_h, x), "b": d_h},
                "layer2": {"W": np.outer(d_out, h), "b": bug * d_out}}

    def bad_grad(p):
        return grad(p, bug=2.0)
""")

PLANTED = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    @gk.case(gradient=lambda x: 3 * x, params=np.ones(3), expect_mismatch=True)
    def caught(x):
        return float(np.sum(x ** 2))

    # declared as a planted bug, but the gradient is right: the check must say it missed
    @gk.case(gradient=lambda x: 3 * x ** 2, params=np.ones(3), expect_mismatch=True)
    def missed(x):
        return float(np.sum(x ** 3))
""")


@pytest.fixture
def folder(tmp_path, monkeypatch):
    (tmp_path / "fit.py").write_text(LINE_FIT)
    (tmp_path / "nested.py").write_text(NESTED)
    (tmp_path / "planted.py").write_text(PLANTED)
    np.savez(tmp_path / "fit.npz", w=np.array([1.5]), b=np.array(0.5))
    monkeypatch.chdir(tmp_path)
    return tmp_path


def one_error(capsys, *args):
    """The single stderr line of a usage error (exit 2), without its prefix."""
    code, _, err = run(capsys, *args)
    assert code == 2, err
    assert err.count("\n") == 1 and err.startswith("gradcheck-kit: error: "), err
    return err[len("gradcheck-kit: error: "):].rstrip("\n")


# --- importing -------------------------------------------------------------------------------

def test_a_file_named_as_target_and_gradient_is_imported_once(folder, capsys):
    (folder / "noisy_import.py").write_text("print('loading noisy_import')\n" + LINE_FIT)
    code, out, _ = run(capsys, "check", "noisy_import.py:mse", "--gradient",
                       "noisy_import.py:mse_grad", "--params", "fit.npz")
    assert code == 0 and out.count("loading noisy_import") == 1


def test_workers_pickle_the_functions_of_a_file_named_twice(folder, capsys):
    code, out, err = run(capsys, "check", "fit.py:mse", "--gradient", "fit.py:mse_grad",
                         "--params", "fit.npz", "--workers", "2", "--quiet")
    assert code == 0 and out.startswith("PASS"), err


def test_a_dotted_module_imports_from_the_working_folder_and_sys_path_is_restored(
        folder, capsys):
    (folder / "mypkg").mkdir()
    (folder / "mypkg" / "__init__.py").write_text("")
    (folder / "mypkg" / "losses.py").write_text(LINE_FIT)
    before = list(sys.path)
    code, out, err = run(capsys, "check", "mypkg.losses", "--quiet")
    assert code == 0 and "[mse]" in out, err
    assert sys.path == before
    for name in [n for n in sys.modules if n == "mypkg" or n.startswith("mypkg.")]:
        del sys.modules[name]    # this test's package, not to leak into others


def test_files_loaded_by_path_leave_no_module_behind(folder, capsys):
    run(capsys, "check", "fit.py", "--quiet")
    assert not [n for n in sys.modules if n.startswith("gradcheck_target_")]


@pytest.mark.parametrize("source, sentence", [
    ("import sys\nsys.exit(5)\n",
     "importing mod.py failed: it called sys.exit(5) while being imported"),
    ("x = 1\ndef f(:\n    pass\n",
     "importing mod.py failed: SyntaxError: invalid syntax (mod.py, line 2)"),
    ("import numpy as np\n\nnp.log(1.0)\nraise RuntimeError('no data folder')\n",
     "importing mod.py failed: RuntimeError: no data folder (mod.py, line 4)"),
])
def test_a_module_that_fails_at_import_gets_one_sentence(folder, capsys, source, sentence):
    (folder / "mod.py").write_text(source)
    assert one_error(capsys, "check", "mod.py") == sentence


def test_an_error_raised_inside_a_library_names_the_users_line(folder, capsys):
    (folder / "mod.py").write_text("import numpy as np\n\nnp.zeros(-1)\n")
    message = one_error(capsys, "check", "mod.py")
    assert message.startswith("importing mod.py failed: ValueError:")
    assert message.endswith("(mod.py, line 3)")


@pytest.mark.parametrize("args, sentence", [
    (["check", "fit.py:mse", "--gradient", "fit.py:NOT_CALLABLE", "--params", "fit.npz"],
     "--gradient: fit.py:NOT_CALLABLE is an int, not a function"),
    (["check", "fit.py:mse", "--params", "."],
     "--params: . is a folder; expected a .npz or .npy file"),
    (["check", "fit.py", "--seed", "-1"],
     "argument --seed: expected a seed (an integer >= 0), got '-1' "
     "(see gradcheck-kit check --help)"),
    (["check", "fit.py", "--rtol", "-0.1"],
     "argument --rtol: expected a finite number >= 0, got '-0.1' "
     "(see gradcheck-kit check --help)"),
    (["check", "fit.py", "--coordinates", "0"],
     "--coordinates: expected a count K >= 1 or coordinate names, got '0'"),
    (["check", "fit.py", "--coordinates", "w[x]"],
     "--coordinates: the index of 'w[x]' must be integers separated by commas, as in "
     "'W[0, 1]'"),
    (["check", "fit.py", "--coordinates", "2", "--coordinates", "b"],
     "--coordinates: expected one count K, or coordinate names such as 'W[0, 1]' (repeat "
     "the option for each), got '2'"),
    (["locate", "fit.py", "--budget", "0"],
     "argument --budget: expected a number of evaluations (an integer >= 1), got '0' "
     "(see gradcheck-kit locate --help)"),
    (["check", "."], ". is a folder; expected a .py file or a module name"),
])
def test_bad_input_gets_one_exact_sentence(folder, capsys, args, sentence):
    assert one_error(capsys, *args) == sentence


def test_an_npz_with_an_extra_key_blames_the_file_not_the_gradient(folder, capsys):
    np.savez(folder / "extra.npz", w=np.array([1.5]), b=np.array(0.5), c=np.zeros(2))
    assert one_error(capsys, "check", "fit.py:mse", "--gradient", "fit.py:mse_grad",
                     "--params", "extra.npz") == (
        "--params: extra.npz holds 'c', which the gradient does not return (it returns 'w', "
        "'b'); save only the parameters the cost takes")


# --- params files ------------------------------------------------------------------------------

def test_dotted_npz_names_rebuild_nested_params_with_the_reports_names(folder, capsys):
    rng = np.random.default_rng(3)
    arrays = {"layer1.W": rng.normal(size=(3, 2)), "layer1.b": rng.normal(size=3),
              "layer2.W": rng.normal(size=(1, 3)), "layer2.b": rng.normal(size=1)}
    np.savez(folder / "net.npz", **arrays)
    code, _, err = run(capsys, "check", "nested.py:cost", "--gradient", "nested.py:grad",
                       "--params", "net.npz", "--json", "net.json")
    assert code == 0, err
    rows = json.loads((folder / "net.json").read_text())["checks"][0]["report"]["rows"]
    assert {r["parameter"] for r in rows} == set(arrays)
    code, out, _ = run(capsys, "check", "nested.py:cost", "--gradient", "nested.py:bad_grad",
                       "--params", "net.npz")
    assert code == 1 and "layer2.b[0]" in out and "disagree" in out


def test_npz_names_that_clash_are_refused(folder, capsys):
    np.savez(folder / "clash.npz", **{"layer1": np.zeros(2), "layer1.W": np.zeros(2)})
    message = one_error(capsys, "check", "nested.py:cost", "--params", "clash.npz")
    assert message.startswith("--params clash.npz: 'layer1' is both an array and")


def test_npy_params(folder, capsys):
    (folder / "quad.py").write_text("import numpy as np\n"
                                    "def cost(x):\n    return float(np.sum(x ** 4))\n"
                                    "def grad(x):\n    return 4 * x ** 3\n"
                                    "def wrong(x):\n    return 3 * x ** 3\n")
    np.save(folder / "x.npy", np.array([0.5, -1.0, 2.0]))
    code, out, _ = run(capsys, "check", "quad.py:cost", "--gradient", "quad.py:grad",
                       "--params", "x.npy", "--quiet")
    assert code == 0 and "all 3 coordinates agree" in out
    code, out, _ = run(capsys, "check", "quad.py:cost", "--gradient", "quad.py:wrong",
                       "--params", "x.npy", "--quiet")
    assert code == 1 and "3 of 3 coordinates fail" in out


def test_target_cost_without_params_uses_the_declared_params(folder, capsys):
    code, out, _ = run(capsys, "check", "fit.py:mse", "--quiet", "--json", "one.json")
    assert code == 0 and "all 2 coordinates agree" in out
    assert [r["name"] for r in json.loads((folder / "one.json").read_text())
            ["checks"][0]["report"]["rows"]] == ["w[0]", "b"]
    code, out, _ = run(capsys, "check", "fit.py:mse", "--gradient", "fit.py:mse_grad_off",
                       "--quiet")
    assert code == 1 and out.startswith("FAIL")


# --- the options the README lists -------------------------------------------------------------

def test_rtol_and_atol_loosen_the_verdict(folder, capsys):
    base = ["check", "fit.py:mse", "--method", "central", "--quiet"]
    code, _, _ = run(capsys, *base, "--gradient", "fit.py:mse_grad_off")
    assert code == 1                    # 1e-5 relative is far above the error estimate
    code, _, _ = run(capsys, *base, "--gradient", "fit.py:mse_grad_off", "--rtol", "1e-3")
    assert code == 0
    code, _, _ = run(capsys, *base, "--gradient", "fit.py:mse_grad_tiny")
    assert code == 1
    code, _, _ = run(capsys, *base, "--gradient", "fit.py:mse_grad_tiny", "--atol", "1e-6")
    assert code == 0


WIDE = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    P = {"W": np.linspace(-1.0, 1.0, 12).reshape(3, 4), "v": np.linspace(0.1, 0.9, 9)}

    def cost(p):
        return float(np.sum(np.cos(p["W"])) + np.sum(p["v"] ** 3))

    def grad(p):
        return {"W": -np.sin(p["W"]), "v": 3 * p["v"] ** 2}

    gk.case(gradient=grad, params=P, method="central")(cost)
""")


def rows_of(path):
    return json.loads(path.read_text())["checks"][0]["report"]["rows"]


def test_coordinates_count_and_seed(folder, capsys):
    (folder / "wide.py").write_text(WIDE)
    for seed, out_file in (("1", "a.json"), ("1", "b.json"), ("2", "c.json")):
        code, out, _ = run(capsys, "check", "wide.py", "--coordinates", "4", "--seed", seed,
                           "--quiet", "--json", out_file)
        assert code == 0 and "of 21 in params" in out
    a, b, c = (rows_of(folder / f) for f in ("a.json", "b.json", "c.json"))
    assert len(a) == 8 and {r["parameter"] for r in a} == {"W", "v"}
    assert [r["name"] for r in a] == [r["name"] for r in b]      # one seed, one sample
    assert [r["name"] for r in a] != [r["name"] for r in c]      # (drawn under the seed)


def test_coordinates_named_on_the_command_line(folder, capsys):
    (folder / "wide.py").write_text(WIDE)
    code, _, err = run(capsys, "check", "wide.py", "--coordinates", "W[2, 1]",
                       "--coordinates", "v[7]", "--coordinates", "W[0]", "--json", "n.json")
    assert code == 0, err
    assert [r["name"] for r in rows_of(folder / "n.json")] == ["W[0, 0]", "W[2, 1]", "v[7]"]


def test_coordinates_option_parses_names():
    assert coordinates_option(None) is None
    assert coordinates_option([" 3 "]) == 3
    assert coordinates_option(["layer1.W[1, 0]", "bias", "v[-1]"]) == \
        {"layer1.W": [(1, 0)], "bias": [()], "v": [-1]}


def test_no_progress_silences_a_bar_the_case_asks_for(folder, capsys):
    (folder / "barred.py").write_text(WIDE.replace('method="central"',
                                                   'method="central", progress=True'))
    code, _, err = run(capsys, "check", "barred.py", "--quiet")
    assert code == 0 and "eval" in err           # tqdm's bar, on stderr
    code, _, err = run(capsys, "check", "barred.py", "--quiet", "--no-progress")
    assert code == 0 and err == ""


# --- planted bugs, version, locate ------------------------------------------------------------

def test_quiet_and_json_mark_planted_bugs(folder, capsys):
    code, out, _ = run(capsys, "check", "planted.py", "--quiet", "--json", "planted.json")
    caught, missed = out.strip().splitlines()
    assert caught.startswith("FAIL") and caught.endswith("[caught; planted bug found, as expected]")
    assert missed.startswith("PASS") and missed.endswith("[missed; planted bug NOT found]")
    assert code == 1                       # the missed one is not as expected
    checks = {c["case"]: c for c in json.loads((folder / "planted.json").read_text())["checks"]}
    assert (checks["caught"]["planted_bug"], checks["caught"]["as_expected"]) == ("found", True)
    assert (checks["missed"]["planted_bug"], checks["missed"]["as_expected"]) == \
        ("not found", False)
    assert checks["caught"]["expect_mismatch"] is True


def test_version_is_the_installed_one(capsys):
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"gradcheck-kit {installed_version('gradcheck_kit')}"
    assert gk.__version__ == installed_version("gradcheck_kit")


def test_locate_finds_the_wrong_coordinate(folder, capsys):
    rng = np.random.default_rng(5)
    np.savez(folder / "net.npz", **{"layer1.W": rng.normal(size=(3, 2)),
                                    "layer1.b": rng.normal(size=3),
                                    "layer2.W": rng.normal(size=(1, 3)),
                                    "layer2.b": rng.normal(size=1)})
    code, out, err = run(capsys, "locate", "nested.py:cost", "--gradient", "nested.py:bad_grad",
                         "--params", "net.npz", "--seed", "0", "--json", "loc.json")
    assert code == 1, err
    assert "mismatch search" in out and "layer2.b[0]" in out
    data = json.loads((folder / "loc.json").read_text())
    assert data["command"] == "locate"
    rows = data["checks"][0]["report"]["rows"]
    assert [r["name"] for r in rows if r["verdict"] == "disagree"] == ["layer2.b[0]"]
    code, out, _ = run(capsys, "locate", "nested.py:cost", "--gradient", "nested.py:grad",
                       "--params", "net.npz", "--seed", "0", "--quiet")
    assert code == 0 and out.startswith("PASS")


def test_locate_on_declared_cases_counts_planted_bugs(folder, capsys):
    code, out, _ = run(capsys, "locate", "planted.py", "--quiet")
    lines = out.strip().splitlines()
    assert lines[0].endswith("[caught; planted bug found, as expected]")
    assert lines[1].endswith("[missed; planted bug NOT found]") and code == 1
