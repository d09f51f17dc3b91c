"""PyTorch values through the public entry points, in the cases test_frameworks_torch.py and
test_cov_frameworks.py leave out: namedtuple params,
a bfloat16 gradient, `.pt` params files that cannot be used.

Derivatives are of x^2 and x^3 (common practice); the tests read verdicts, messages, notes.
"""
import collections
import textwrap

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit.cli import main

torch = pytest.importorskip("torch")

Point = collections.namedtuple("Point", ["weights", "shift"])


def _f64(values):
    return torch.tensor(values, dtype=torch.float64)


def test_namedtuple_params_of_tensors_keep_their_type_and_field_names():
    params = Point(_f64([0.5, -1.5]), _f64(2.0))

    def cost(p):
        return (p.weights ** 2).sum() + p.shift ** 3

    report = gk.compare_gradient(cost, params, lambda p: Point(2 * p.weights, 3 * p.shift ** 2))
    assert report.passed, report.to_text()
    assert {r.parameter for r in report.rows} == {"weights", "shift"}
    g = gk.numeric_gradient(cost, params)
    assert type(g) is Point and torch.is_tensor(g.weights)
    np.testing.assert_allclose(g.weights.numpy(), [1.0, -3.0], rtol=1e-8)
    assert float(g.shift) == pytest.approx(12.0, rel=1e-8)


def test_a_gradient_given_in_bfloat16_is_read_as_float32():
    # 2x at these points is exact in bfloat16 (8 bits of mantissa suffice)
    x = _f64([0.5, 1.0, -2.0])
    report = gk.compare_gradient(lambda t: (t ** 2).sum(), x,
                                 lambda t: (2 * t).to(torch.bfloat16))
    assert report.passed, report.to_text()
    wrong = gk.compare_gradient(lambda t: (t ** 2).sum(), x,
                                lambda t: (torch.tensor([1.0, 2.5, -4.0])).to(torch.bfloat16))
    assert not wrong.passed and {r.name for r in wrong.mismatches} == {"x[1]"}


@pytest.fixture
def project(tmp_path, monkeypatch):
    (tmp_path / "quad.py").write_text(textwrap.dedent("""
        def cost(p):
            return (p["w"] ** 2).sum()

        def grad(p):
            return {"w": 2 * p["w"]}
    """))
    monkeypatch.chdir(tmp_path)
    return tmp_path


def test_a_truncated_pt_file_is_a_usage_error_naming_the_file(project, capsys):
    torch.save({"w": torch.ones(3, dtype=torch.float64)}, project / "start.pt")
    data = (project / "start.pt").read_bytes()
    (project / "start.pt").write_bytes(data[: len(data) // 2])     # a copy cut short
    code = main(["check", "quad.py:cost", "--gradient", "quad.py:grad", "--params", "start.pt"])
    err = capsys.readouterr().err
    assert code == 2
    assert "--params: cannot read start.pt: " in err and "Traceback" not in err


def test_a_file_that_is_no_torch_archive_is_not_called_a_pickle(project, capsys):
    (project / "start.pt").write_text("w = 0.5, 1.5\n")
    code = main(["check", "quad.py:cost", "--gradient", "quad.py:grad", "--params", "start.pt"])
    err = capsys.readouterr().err
    assert code == 2 and "Python objects" not in err


def test_a_pt_file_without_floating_point_tensors_is_refused(project, capsys):
    torch.save({"w": torch.arange(3)}, project / "counts.pt")
    code = main(["check", "quad.py:cost", "--gradient", "quad.py:grad", "--params", "counts.pt"])
    err = capsys.readouterr().err
    assert code == 2
    assert "--params: counts.pt holds no floating-point tensor" in err


def test_a_pt_state_dict_is_checked_from_the_command_line(project, capsys):
    torch.save({"w": torch.tensor([0.5, -1.0, 2.0], dtype=torch.float64)}, project / "w.pt")
    code = main(["check", "quad.py:cost", "--gradient", "quad.py:grad", "--params", "w.pt"])
    out = capsys.readouterr().out
    assert code == 0 and "PASS" in out and "w[2]" in out
