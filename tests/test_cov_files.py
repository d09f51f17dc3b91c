"""Report files written safely and params files read, through the paths users meet when
something is wrong: empty names, symlink loops, a write that fails half-way, files of
another owner, damaged params files."""
import errno
import os

import numpy as np
import pytest

from gradcheck_kit import files
from gradcheck_kit.cli import main
from gradcheck_kit.files import ParamsFileError, UnwritablePathError, load_params, write_atomically


def test_an_empty_path_is_refused_by_name():
    with pytest.raises(UnwritablePathError) as info:
        write_atomically("", "{}\n", "--json")
    assert str(info.value) == "--json: expected a file name, got an empty path"


def test_an_empty_json_path_is_refused_before_any_work(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "never_imported.py").write_text("raise SystemExit('imported')\n")
    code = main(["check", "never_imported.py", "--json", ""])
    err = capsys.readouterr().err
    assert code == 2
    assert "--json: expected a file name, got an empty path" in err and "imported" not in err


def test_a_symlink_loop_is_refused_with_the_reason(tmp_path):
    os.symlink(tmp_path / "b.json", tmp_path / "a.json")
    os.symlink(tmp_path / "a.json", tmp_path / "b.json")
    with pytest.raises(UnwritablePathError) as info:
        write_atomically(tmp_path / "a.json", "{}\n", "--json")
    message = str(info.value)
    assert message.startswith("--json: cannot use ") and "a.json" in message
    assert "symbolic links" in message          # the system's strerror for ELOOP
    assert os.path.islink(tmp_path / "a.json")  # the links are left as they were


def test_a_write_that_fails_half_way_keeps_the_old_report_and_no_stray_file(tmp_path,
                                                                           monkeypatch):
    target = tmp_path / "report.json"
    target.write_text('{"old": true}\n')

    def disk_full(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(files.os, "fsync", disk_full)
    with pytest.raises(OSError) as info:
        write_atomically(target, '{"new": true}\n')
    monkeypatch.undo()
    assert info.value.errno == errno.ENOSPC
    assert target.read_text() == '{"old": true}\n'
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.json"]


def test_a_full_disk_while_writing_the_json_is_one_line_and_status_2(tmp_path, monkeypatch,
                                                                     capsys):
    (tmp_path / "quad.py").write_text(
        "import numpy as np\nimport gradcheck_kit as gk\n"
        "gk.case(gradient=lambda x: 2 * x, params=np.array([1.0, -2.0]))(\n"
        "    lambda x: float(np.sum(x ** 2)))\n")
    monkeypatch.chdir(tmp_path)
    real_fsync = os.fsync

    def disk_full(fd):
        if os.path.basename(os.readlink(f"/proc/self/fd/{fd}")).startswith(".run.json"):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_fsync(fd)

    if not os.path.isdir("/proc/self/fd"):
        pytest.skip("needs /proc to tell the report's file descriptor")
    monkeypatch.setattr(files.os, "fsync", disk_full)
    code = main(["check", "quad.py", "--json", "run.json"])
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert code == 2
    assert "--json: cannot write run.json: No space left on device" in err
    assert "Traceback" not in err and not (tmp_path / "run.json").exists()


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() != 0,
                    reason="only root may give a file to another owner")
def test_a_replaced_report_keeps_its_owner_and_mode(tmp_path):
    target = tmp_path / "shared.json"
    target.write_text("{}\n")
    os.chown(target, 4321, 4322)
    os.chmod(target, 0o640)
    write_atomically(target, '{"a": 1}\n')
    st = os.stat(target)
    assert (st.st_uid, st.st_gid) == (4321, 4322)
    assert st.st_mode & 0o777 == 0o640
    assert target.read_text() == '{"a": 1}\n'


# --- params files ----------------------------------------------------------------------

def test_a_truncated_npy_file_says_it_cannot_be_read(tmp_path):
    path = tmp_path / "weights.npy"
    np.save(path, np.arange(10.0))
    path.write_bytes(path.read_bytes()[:140])      # a copy cut short
    with pytest.raises(ParamsFileError) as info:
        load_params(path)
    message = str(info.value)
    assert message.startswith(f"--params: cannot read {path}: ")
    assert "pickled" not in message


def test_a_damaged_npz_file_says_it_cannot_be_read(tmp_path):
    path = tmp_path / "weights.npz"
    path.write_bytes(b"PK\x03\x04 not really a zip archive")
    with pytest.raises(ParamsFileError) as info:
        load_params(path, "params file")
    assert str(info.value).startswith(f"params file: cannot read {path}: ")


def test_a_text_file_named_npy_is_not_called_a_pickle(tmp_path):
    path = tmp_path / "weights.npy"
    path.write_text("0.5 1.5 2.5\n")
    with pytest.raises(ParamsFileError) as info:
        load_params(path)
    assert "pickled" not in str(info.value)
