"""`--params FILE` with a file the command cannot use: one line on stderr that names the
option and the file and says what was expected and what the file holds, exit status 2,
no traceback.  One test per kind of bad file (the good ones: test_cli_inputs.py)."""
import builtins
import errno
import os
import textwrap

import numpy as np
import pytest

from cli_runs import run_cli

# A cost over {"w": 3 numbers, "b": 2 numbers} (invented), once declared with its params,
# once not, and one whose shapes must fit a fixed data row.
MODEL = textwrap.dedent("""
    import numpy as np
    import gradcheck_kit as gk

    ROW = np.array([[1.0, 2.0, 3.0]])

    def cost(p):
        return float(np.sum(p["w"] ** 2) + np.sum(p["b"]))

    def grad(p):
        return {"w": 2 * p["w"], "b": np.ones_like(p["b"])}

    def declared(p):
        return cost(p)

    gk.case(gradient=grad, params={"w": np.ones(3), "b": np.zeros(2)})(declared)

    def fitted(p):
        return float(np.sum((ROW @ p["w"]) ** 2) + np.sum(p["b"]))

    def fitted_grad(p):
        return {"w": 2 * ROW.T @ (ROW @ p["w"]), "b": np.ones_like(p["b"])}
""")


@pytest.fixture
def folder(tmp_path, monkeypatch):
    (tmp_path / "model.py").write_text(MODEL)
    monkeypatch.chdir(tmp_path)
    return tmp_path


def params_error(capsys, *args, command="check"):
    """The one stderr line of a refused --params file, without the program's prefix."""
    code, out, err = run_cli(capsys, command, *args)
    assert code == 2, out + err
    assert err.count("\n") == 1 and err.startswith("gradcheck-kit: error: --params"), err
    return err[len("gradcheck-kit: error: "):].rstrip("\n")


def check(capsys, cost, file, command="check"):
    return params_error(capsys, f"model.py:{cost}", "--params", file, command=command)


# --- the file itself --------------------------------------------------------------------------

def test_a_missing_file(folder, capsys):
    assert check(capsys, "cost", "absent.npz") == "--params: no such file: absent.npz"


def test_a_format_that_is_not_read(folder, capsys):
    (folder / "p.json").write_text('{"w": [1, 2, 3], "b": [0, 0]}')
    assert check(capsys, "cost", "p.json") == \
        "--params: expected a .npz or .npy file (or a PyTorch .pt), got p.json"


def test_a_file_that_is_not_what_its_name_says(folder, capsys):
    (folder / "p.npz").write_text("w = 1, 2, 3")
    assert check(capsys, "cost", "p.npz") == (
        "--params: p.npz is not a numpy .npz file (its header is missing); save arrays with "
        "numpy.save or numpy.savez")


def test_a_cut_off_file(folder, capsys):
    np.savez(folder / "whole.npz", w=np.ones(3), b=np.zeros(2))
    (folder / "cut.npz").write_bytes((folder / "whole.npz").read_bytes()[:60])
    assert check(capsys, "cost", "cut.npz").startswith("--params: cannot read cut.npz: ")


def test_an_unreadable_file(folder, capsys, monkeypatch):
    np.savez(folder / "locked.npz", w=np.ones(3), b=np.zeros(2))
    real_open = builtins.open

    def refusing_open(file, *args, **kwargs):   # what a file without read permission does
        if isinstance(file, (str, os.PathLike)) and os.fspath(file).endswith("locked.npz"):
            raise PermissionError(errno.EACCES, "Permission denied", os.fspath(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", refusing_open)
    assert check(capsys, "cost", "locked.npz") == \
        "--params: cannot read locked.npz: Permission denied"


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="FIFOs are a POSIX thing")
def test_a_fifo_is_refused_without_waiting_for_a_writer(folder, capsys):
    os.mkfifo(folder / "pipe.npz")
    assert check(capsys, "cost", "pipe.npz") == \
        "--params: pipe.npz is a FIFO; expected a .npz or .npy file"


# --- what the file holds ------------------------------------------------------------------------

@pytest.mark.parametrize("w, sentence", [
    (np.array(["1.0", "2.0", "3.0"]),
     "'w' holds <U3 entries; expected floating-point numbers (save numbers, not text, dates "
     "or records)"),
    (np.arange(3), "'w' holds int64 entries; expected floating-point numbers (save it with "
     ".astype(float))"),
    (np.ones(3, dtype=bool), "'w' holds bool entries; expected floating-point numbers (save "
     "it with .astype(float))"),
    (np.ones(3) * 1j, "'w' holds complex128 entries; expected floating-point numbers (only "
     "real parameters are checked: save real and imaginary parts apart)"),
    (np.array(["2024-01-01"] * 3, dtype="datetime64[D]"),
     "'w' holds datetime64[D] entries; expected floating-point numbers (save numbers, not "
     "text, dates or records)"),
])
def test_arrays_that_are_not_real_numbers(folder, capsys, w, sentence):
    np.savez(folder / "odd.npz", w=w, b=np.zeros(2))
    assert check(capsys, "cost", "odd.npz") == f"--params: odd.npz: {sentence}"


def test_an_npy_of_text(folder, capsys):
    np.save(folder / "words.npy", np.array(["a", "b"]))
    assert check(capsys, "cost", "words.npy") == (
        "--params: words.npy: its array holds <U1 entries; expected floating-point numbers "
        "(save numbers, not text, dates or records)")


def test_a_key_the_cost_looks_up_is_missing(folder, capsys):
    np.savez(folder / "renamed.npz", v=np.ones(3), b=np.zeros(2))
    assert check(capsys, "cost", "renamed.npz") == (
        "--params: renamed.npz lacks 'w', which the cost looks up; it holds 'v' of shape (3,), "
        "'b' of shape (2,)")
    # the same through locate, and with --gradient
    assert check(capsys, "cost", "renamed.npz", command="locate").startswith(
        "--params: renamed.npz lacks 'w', which the cost looks up")
    assert params_error(capsys, "model.py:cost", "--gradient", "model.py:grad", "--params",
                        "renamed.npz").startswith("--params: renamed.npz lacks 'w'")


def test_keys_unlike_the_declared_params(folder, capsys):
    np.savez(folder / "renamed.npz", v=np.ones(3), b=np.zeros(2))
    assert check(capsys, "declared", "renamed.npz") == (
        "--params: renamed.npz: cost raised KeyError at the base point: 'w'; expected 'w' of "
        "shape (3,), 'b' of shape (2,) like the declared params, got 'v' of shape (3,), 'b' "
        "of shape (2,)")


def test_a_shape_the_cost_cannot_take(folder, capsys):
    np.savez(folder / "wide.npz", w=np.ones(4), b=np.zeros(2))
    message = params_error(capsys, "model.py:fitted", "--gradient", "model.py:fitted_grad",
                           "--params", "wide.npz")
    assert message.startswith("--params: wide.npz: cost raised ValueError at the base point: ")
    assert message.endswith("; the file holds 'w' of shape (4,), 'b' of shape (2,)")


def test_one_array_where_the_declared_params_are_named_arrays(folder, capsys):
    np.save(folder / "flat.npy", np.ones(5))
    message = check(capsys, "declared", "flat.npy")
    assert message.startswith("--params: flat.npy: cost raised IndexError at the base point: ")
    assert message.endswith("; expected 'w' of shape (3,), 'b' of shape (2,) like the declared "
                            "params, got one array of shape (5,)")


def test_a_file_with_other_shapes_than_declared_that_the_cost_takes_is_checked(folder, capsys):
    # declared params are an example, not a schema: a bigger point is checked as given
    np.savez(folder / "big.npz", w=np.ones(5), b=np.zeros(4))
    code, out, err = run_cli(capsys, "check", "model.py:declared", "--params", "big.npz",
                             "--quiet")
    assert code == 0 and "all 9 coordinates agree" in out, out + err


def test_a_refused_file_is_left_as_it_was(folder, capsys):
    np.savez(folder / "renamed.npz", v=np.ones(3), b=np.zeros(2))
    before = (folder / "renamed.npz").read_bytes()
    check(capsys, "cost", "renamed.npz")
    assert (folder / "renamed.npz").read_bytes() == before
