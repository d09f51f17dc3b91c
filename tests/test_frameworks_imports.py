"""A user without PyTorch or JAX pays nothing: importing gradcheck_kit imports neither,
and a plain numpy check leaves them unimported."""
import subprocess
import sys


def test_import_and_a_numpy_check_load_no_framework():
    code = ("import sys, numpy as np\n"
            "import gradcheck_kit as gk\n"
            "report = gk.compare_gradient(lambda x: np.sum(x ** 2), np.array([1.0, 2.0]),\n"
            "                             lambda x: 2 * x)\n"
            "assert report.passed\n"
            "loaded = [m for m in ('torch', 'jax', 'jaxlib') if m in sys.modules]\n"
            "print(','.join(loaded) or 'none')\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "none"
