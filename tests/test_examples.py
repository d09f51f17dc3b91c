"""The bundled examples run from the command line and under pytest, with the outcome
each one documents (a planted bug fails, a right gradient passes)."""
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
# True: the example plants a bug and declares it (expect_mismatch=True)
PLANTED = {"bike_share_demand.py": True, "greenhouse_heat_loss.py": False,
           "parcel_classifier.py": True, "soft_clip_primitive.py": False}


def test_every_example_is_listed():
    assert {p.name for p in EXAMPLES.glob("*.py")} == set(PLANTED)


@pytest.mark.parametrize("name, planted", sorted(PLANTED.items()))
def test_example_from_the_command_line(name, planted):
    done = subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", str(EXAMPLES / name)],
                          capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr   # planted bugs found, as declared
    assert ("FAIL" if planted else "PASS") in done.stdout
    if planted:
        assert "the mismatch above was expected" in done.stdout


def test_the_planted_bug_without_its_declaration_exits_1(tmp_path):
    import runpy

    import numpy as np

    start = runpy.run_path(str(EXAMPLES / "bike_share_demand.py"))["START"]
    np.savez(tmp_path / "start.npz", **start)
    target = EXAMPLES / "bike_share_demand.py"
    done = subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", f"{target}:demand_cost",
                           "--gradient", f"{target}:demand_gradient", "--params",
                           str(tmp_path / "start.npz")], capture_output=True, text=True)
    assert done.returncode == 1 and "bias" in done.stdout and "mean versus sum" in done.stdout


@pytest.mark.parametrize("name, planted", sorted(PLANTED.items()))
def test_example_under_pytest(pytester, name, planted):
    shutil.copy(EXAMPLES / name, pytester.path / name)
    result = pytester.runpytest(name, "-p", "no:cacheprovider")
    result.assert_outcomes(**({"xfailed": 1} if planted else {"passed": 1}))


@pytest.mark.parametrize("name", sorted(PLANTED))
def test_example_as_a_script(name):
    done = subprocess.run([sys.executable, str(EXAMPLES / name)], capture_output=True, text=True)
    assert done.returncode == 0 and "gradient check" in done.stdout
