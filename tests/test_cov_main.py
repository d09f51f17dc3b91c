"""`python -m gradcheck_kit`, run in-process (runpy) so the module's own lines are measured."""
import runpy
import sys

import pytest

import gradcheck_kit as gk


def _run_as_main(monkeypatch, *args):
    monkeypatch.setattr(sys, "argv", ["gradcheck-kit", *args])
    # pytest's assertion-rewriting finder cannot hand runpy the module's code once the
    # doctests have imported the package through it: find it the ordinary way
    monkeypatch.setattr(sys, "meta_path", [f for f in sys.meta_path
                                           if type(f).__name__ != "AssertionRewritingHook"])
    monkeypatch.delitem(sys.modules, "gradcheck_kit.__main__", raising=False)
    with pytest.raises(SystemExit) as info:
        runpy.run_module("gradcheck_kit", run_name="__main__", alter_sys=True)
    return info.value.code


def test_python_dash_m_prints_the_version_and_exits_0(monkeypatch, capsys):
    assert _run_as_main(monkeypatch, "--version") == 0
    assert capsys.readouterr().out.strip() == f"gradcheck-kit {gk.__version__}"


def test_python_dash_m_without_a_target_is_a_usage_error(monkeypatch, capsys):
    assert _run_as_main(monkeypatch, "check") == 2
    err = capsys.readouterr().err
    assert "TARGET" in err and "Traceback" not in err


def test_importing_the_module_runs_nothing(monkeypatch, capsys):
    _run_as_main(monkeypatch, "--version")
    capsys.readouterr()
    runpy.run_module("gradcheck_kit", run_name="not_main")
    assert capsys.readouterr().out == ""
