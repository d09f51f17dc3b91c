"""The bundled examples run from the command line and under pytest, with the outcome
each one documents (a planted bug fails, a right gradient passes)."""
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
EXPECTED = {"bike_share_demand.py": 1, "greenhouse_heat_loss.py": 0,
            "parcel_classifier.py": 1, "soft_clip_primitive.py": 0}


def test_every_example_is_listed():
    assert {p.name for p in EXAMPLES.glob("*.py")} == set(EXPECTED)


@pytest.mark.parametrize("name, code", sorted(EXPECTED.items()))
def test_example_from_the_command_line(name, code):
    done = subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", str(EXAMPLES / name)],
                          capture_output=True, text=True)
    assert done.returncode == code, done.stdout + done.stderr
    assert ("FAIL" if code else "PASS") in done.stdout


@pytest.mark.parametrize("name, code", sorted(EXPECTED.items()))
def test_example_under_pytest(pytester, name, code):
    shutil.copy(EXAMPLES / name, pytester.path / name)
    result = pytester.runpytest(name, "-p", "no:cacheprovider")
    result.assert_outcomes(**({"failed": 1} if code else {"passed": 1}))


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_example_as_a_script(name):
    done = subprocess.run([sys.executable, str(EXAMPLES / name)], capture_output=True, text=True)
    assert done.returncode == 0 and "gradient check" in done.stdout
