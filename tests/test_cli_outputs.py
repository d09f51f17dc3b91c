"""Where the command line writes: outputs checked before the run, and reports written
so that nothing but a regular file is ever replaced (gradcheck_kit.files)."""
import json
import os
import socket
import stat
import sys
import textwrap

import numpy as np
import pytest

from gradcheck_kit.cli import main
from gradcheck_kit.files import (ParamsFileError, UnwritablePathError, load_params, nest_dotted,
                                 write_atomically)

# The module writes a marker when imported: a refused output must be refused before that.
MODULE = textwrap.dedent("""
    import pathlib
    import numpy as np
    import gradcheck_kit as gk

    pathlib.Path(__file__).with_name("imported.marker").write_text("yes")

    @gk.case(gradient=lambda x: 2 * x, params=np.array([0.5, -1.0]), method="central")
    def square(x):
        return float(np.sum(x ** 2))
""")

posix_only = pytest.mark.skipif(sys.platform == "win32", reason="FIFOs, sockets and modes")


@pytest.fixture
def folder(tmp_path, monkeypatch):
    (tmp_path / "mod.py").write_text(MODULE)
    monkeypatch.chdir(tmp_path)
    return tmp_path


def refused(capsys, folder, *args):
    """Exit 2 with one line, and the module never imported (so nothing was run)."""
    code = main(["check", "mod.py", *map(str, args)])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err, err
    assert not (folder / "imported.marker").exists()
    return err[len("gradcheck-kit: error: "):].rstrip("\n")


def test_json_into_a_missing_folder(folder, capsys):
    assert refused(capsys, folder, "--json", "nowhere/r.json") == \
        "--json: the folder nowhere does not exist"


def test_json_onto_a_folder(folder, capsys):
    (folder / "out").mkdir()
    assert refused(capsys, folder, "--json", "out") == \
        "--json: out is a folder; give a file name in it"


@pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="needs Linux's /proc")
def test_json_into_a_folder_nobody_may_write(folder, capsys):
    # /proc refuses new files even to root, so this holds whoever runs the tests
    message = refused(capsys, folder, "--json", "/proc/gradcheck-report.json")
    assert message.startswith("--json: cannot write in the folder /proc (")


def test_plot_with_an_unknown_extension(folder, capsys):
    pytest.importorskip("matplotlib")
    message = refused(capsys, folder, "--plot", "fig.xyz")
    assert message.startswith("--plot: unknown file type '.xyz' in fig.xyz; expected one of ")
    assert ".png" in message and ".pdf" in message


def test_plot_into_a_missing_folder(folder, capsys):
    pytest.importorskip("matplotlib")
    assert refused(capsys, folder, "--plot", "figs/fig.png") == \
        "--plot: the folder figs does not exist"


@posix_only
def test_json_onto_a_fifo_is_refused_and_the_fifo_kept(folder, capsys):
    os.mkfifo(folder / "pipe")
    assert refused(capsys, folder, "--json", "pipe") == \
        "--json: pipe is a FIFO, not a regular file; refusing to replace it"
    assert stat.S_ISFIFO(os.stat(folder / "pipe").st_mode)


# --- write_atomically --------------------------------------------------------------------------

@posix_only
def test_a_socket_is_never_replaced(tmp_path):
    path = tmp_path / "s"
    server = socket.socket(socket.AF_UNIX)
    try:
        server.bind(str(path))
        with pytest.raises(UnwritablePathError, match="is a socket, not a regular file"):
            write_atomically(path, "{}")
        assert stat.S_ISSOCK(os.stat(path).st_mode)
    finally:
        server.close()


@posix_only
def test_a_fifo_is_never_replaced(tmp_path):
    os.mkfifo(tmp_path / "p")
    with pytest.raises(UnwritablePathError, match="is a FIFO"):
        write_atomically(tmp_path / "p", "{}")
    assert stat.S_ISFIFO(os.stat(tmp_path / "p").st_mode)


@posix_only
def test_a_symlink_is_written_through_and_stays_a_link(tmp_path):
    (tmp_path / "reports").mkdir()
    real = tmp_path / "reports" / "latest.json"
    real.write_text("old\n")
    link = tmp_path / "report.json"
    link.symlink_to(real)
    write_atomically(link, "new\n")
    assert link.is_symlink() and real.read_text() == "new\n"
    dangling = tmp_path / "next.json"
    dangling.symlink_to(tmp_path / "reports" / "next-real.json")
    write_atomically(dangling, "made\n")
    assert dangling.is_symlink() and (tmp_path / "reports" / "next-real.json").read_text() == \
        "made\n"


@posix_only
def test_an_existing_file_keeps_its_mode_and_a_new_one_gets_the_umasks(tmp_path):
    kept = tmp_path / "kept.json"
    kept.write_text("old\n")
    os.chmod(kept, 0o644)
    write_atomically(kept, "new\n")
    assert stat.S_IMODE(os.stat(kept).st_mode) == 0o644 and kept.read_text() == "new\n"
    os.chmod(kept, 0o640)
    write_atomically(kept, "newer\n")
    assert stat.S_IMODE(os.stat(kept).st_mode) == 0o640
    old_umask = os.umask(0o027)
    try:
        write_atomically(tmp_path / "fresh.json", "x\n")
    finally:
        os.umask(old_umask)
    assert stat.S_IMODE(os.stat(tmp_path / "fresh.json").st_mode) == 0o640


def test_the_data_reaches_the_disk_before_the_rename(tmp_path, monkeypatch):
    order = []
    real_fsync, real_replace = os.fsync, os.replace
    monkeypatch.setattr(os, "fsync", lambda fd: (order.append("fsync"), real_fsync(fd))[1])
    monkeypatch.setattr(os, "replace", lambda a, b: (order.append("replace"),
                                                     real_replace(a, b))[1])
    write_atomically(tmp_path / "r.json", "{}\n")
    assert order[:2] == ["fsync", "replace"]
    assert os.listdir(tmp_path) == ["r.json"]     # no temporary file left


def test_a_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path, monkeypatch):
    target = tmp_path / "r.json"
    target.write_text("old\n")

    def fail(fd):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(os, "fsync", fail)
    with pytest.raises(OSError, match="No space left"):
        write_atomically(target, "new\n")
    assert target.read_text() == "old\n" and os.listdir(tmp_path) == ["r.json"]


def test_the_plugin_import_still_finds_write_atomically():
    from gradcheck_kit import report

    assert report.write_atomically is write_atomically


def test_the_cli_writes_json_through_a_symlink(folder, capsys):
    (folder / "real.json").write_text("")
    (folder / "link.json").symlink_to(folder / "real.json")
    assert main(["check", "mod.py", "--json", "link.json", "--quiet"]) == 0
    assert (folder / "link.json").is_symlink()
    assert json.loads((folder / "real.json").read_text())["passed"] is True


# --- load_params -------------------------------------------------------------------------------

def test_load_params_nests_dotted_names_and_numbers_become_lists(tmp_path):
    np.savez(tmp_path / "p.npz", **{"layers.0.W": np.ones((2, 2)), "layers.1.W": np.zeros(2),
                                    "scale": np.array(2.0)})
    params = load_params(tmp_path / "p.npz")
    assert sorted(params) == ["layers", "scale"] and isinstance(params["layers"], list)
    assert params["layers"][0]["W"].shape == (2, 2) and params["layers"][1]["W"].shape == (2,)


@pytest.mark.parametrize("flat, words", [
    ({"a..b": 1.0}, "the name 'a..b' has an empty part"),
    ({"a": 1.0, "a.b": 2.0}, "'a' is both an array and the group of 'a.b'"),
    ({"a.b": 1.0, "a": 2.0}, "'a' is both an array and a group of arrays (such as 'a.b')"),
])
def test_names_that_cannot_nest_are_refused(flat, words):
    with pytest.raises(ParamsFileError, match=words.replace("(", r"\(").replace(")", r"\)")):
        nest_dotted(flat)


def test_an_empty_npz_is_refused(tmp_path):
    np.savez(tmp_path / "empty.npz")
    with pytest.raises(ParamsFileError, match="holds no arrays"):
        load_params(tmp_path / "empty.npz")


def test_a_write_that_fails_after_the_run_is_one_line(folder, capsys, monkeypatch):
    def full_disk(fd):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(os, "fsync", full_disk)
    assert main(["check", "mod.py", "--quiet", "--json", "r.json"]) == 2
    err = capsys.readouterr().err
    assert err == "gradcheck-kit: error: --json: cannot write r.json: No space left on device\n"
