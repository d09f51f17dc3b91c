"""The bundled examples run from the command line and under pytest, with the outcome
each one documents (a planted bug fails, a right gradient passes)."""
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
# Declared cases (checked by the command and the plugin). True: the case plants a bug and
# declares it (expect_mismatch=True); False: its gradient is right where it is declared.
PLANTED = {"bike_share_demand.py": True, "greenhouse_heat_loss.py": False,
           "parcel_classifier.py": True, "soft_clip_primitive.py": False,
           "cold_store_compressor.py": False,     # its bug is out of reach at the start
           "orchard_canopy_torch.py": False, "tide_gauge_jax.py": False}
# What each example prints when run as a script: the verdicts of its summary lines, in
# order, as its docstring documents them.
SCRIPT_VERDICTS = {
    "bike_share_demand.py": ["FAIL"], "greenhouse_heat_loss.py": ["PASS"],
    "parcel_classifier.py": ["FAIL"], "soft_clip_primitive.py": ["PASS"],
    "cold_store_compressor.py": ["PASS", "FAIL"],   # right at the start, wrong once clipped
    "orchard_canopy_torch.py": ["PASS"], "tide_gauge_jax.py": ["PASS"],
    "turbine_power_minibatch.py": ["PASS", "FAIL"],  # right estimator, then the planted bug
}
# Examples that need an optional framework: skipped where it is not installed.
NEEDS = {"orchard_canopy_torch.py": "torch", "tide_gauge_jax.py": "jax"}


def summary_verdicts(stdout):
    return [line.split()[0] for line in stdout.splitlines() if line.startswith(("PASS", "FAIL"))]


def needs(name):
    if name in NEEDS:
        pytest.importorskip(NEEDS[name])


def test_every_example_is_listed():
    assert {p.name for p in EXAMPLES.glob("*.py")} == set(SCRIPT_VERDICTS)
    assert set(PLANTED) <= set(SCRIPT_VERDICTS)


@pytest.mark.parametrize("name, planted", sorted(PLANTED.items()))
def test_example_from_the_command_line(name, planted):
    needs(name)
    done = subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", str(EXAMPLES / name)],
                          capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr   # planted bugs found, as declared
    summaries = [line for line in done.stdout.splitlines() if line.startswith(("PASS", "FAIL"))]
    assert summaries and all(line.startswith("FAIL" if planted else "PASS")
                             for line in summaries), done.stdout
    assert ("the mismatch above was expected" in done.stdout) == planted, done.stdout


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
    needs(name)
    shutil.copy(EXAMPLES / name, pytester.path / name)
    result = pytester.runpytest(name, "-p", "no:cacheprovider")
    result.assert_outcomes(**({"xfailed": 1} if planted else {"passed": 1}))


@pytest.mark.parametrize("name, verdicts", sorted(SCRIPT_VERDICTS.items()))
def test_example_as_a_script(name, verdicts):
    """Run as a script, an example prints plain reports: FAIL where it plants a bug (a
    script has no declaration to expect it), PASS where the gradient is right."""
    needs(name)
    done = subprocess.run([sys.executable, str(EXAMPLES / name)], capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr
    assert summary_verdicts(done.stdout) == verdicts, done.stdout
