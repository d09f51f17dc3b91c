"""The README stays true: its Quick start has two one-line commands, and its Python
example runs and fails the way the text says."""
import re
from pathlib import Path

README = (Path(__file__).resolve().parent.parent / "README.md").read_text()


def blocks(text):
    return re.findall(r"```(\w*)\n(.*?)```", text, flags=re.S)


def test_quick_start_has_two_one_line_commands():
    section = README.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = [body for lang, body in blocks(section)][:2]
    assert len(commands) == 2 and all(body.count("\n") == 1 for body in commands)
    assert "gradcheck-kit check examples/" in commands[0] and "pytest" in commands[1]


def test_the_assertion_example_runs():
    code = next(body for lang, body in blocks(README) if lang == "python")
    namespace = {}
    exec(compile(code, "README.md", "exec"), namespace)   # raises if the gradient were wrong
    import gradcheck_kit as gk
    import pytest

    def transposed(p):
        g = namespace["grad"](p)
        return {"W": g["W"].T, "b": g["b"]}
    with pytest.raises(gk.GradientMismatchError, match="transposed"):
        gk.assert_gradient_matches(namespace["cost"], namespace["params"], transposed)
