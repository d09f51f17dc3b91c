"""Running the command line inside a test, shared by the command-line tests."""
from gradcheck_kit.cli import main


def run_cli(capsys, *args):
    """(exit code, stdout, stderr) of `gradcheck-kit ARGS`; never a traceback."""
    code = main([*map(str, args)])
    out = capsys.readouterr()
    assert "Traceback" not in out.err + out.out
    return code, out.out, out.err


def run_check(capsys, *args):
    """run_cli for `gradcheck-kit check ARGS`."""
    return run_cli(capsys, "check", *args)
