"""The command line takes PyTorch `.pt` params files, loaded as weights only (no pickled
code runs), and refuses one that holds anything else in one sentence, exit 2."""
import subprocess
import sys
import textwrap

import pytest

torch = pytest.importorskip("torch", reason="PyTorch is not installed (extra: torch)")

MODULE = textwrap.dedent("""
    import torch
    def loss(p):
        return (p["w"] ** 3).sum() + p["b"].sum() ** 2
    def grad(p):
        return {"w": 3 * p["w"] ** 2, "b": 2 * p["b"].sum() * torch.ones_like(p["b"])}
    def wrong(p):
        return {"w": 3 * p["w"] ** 2, "b": p["b"].sum() * torch.ones_like(p["b"])}
""")


def run(tmp_path, *args):
    (tmp_path / "lossmod.py").write_text(MODULE)
    return subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", *args],
                          cwd=tmp_path, capture_output=True, text=True, timeout=300)


@pytest.mark.parametrize("gradient, code", [("grad", 0), ("wrong", 1)])
def test_a_pt_params_file_is_checked_like_an_npz(tmp_path, gradient, code):
    torch.save({"w": torch.tensor([1.0, 2.0]), "b": torch.tensor([0.5])}, tmp_path / "p.pt")
    out = run(tmp_path, "lossmod.py:loss", "--gradient", f"lossmod.py:{gradient}",
              "--params", "p.pt")
    assert out.returncode == code, out.stderr
    assert ("PASS" if code == 0 else "FAIL") in out.stdout
    if code:
        assert "b[0]" in out.stdout and "disagree" in out.stdout


def test_a_pt_file_with_pickled_objects_is_refused(tmp_path):
    import datetime      # a global that weights-only loading does not allow
    torch.save({"w": torch.ones(2), "when": datetime.date(2020, 1, 1)}, tmp_path / "p.pt")
    out = run(tmp_path, "lossmod.py:loss", "--gradient", "lossmod.py:grad", "--params", "p.pt")
    assert out.returncode == 2
    assert "Traceback" not in out.stderr and len(out.stderr.strip().splitlines()) == 1
