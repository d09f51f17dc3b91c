"""Shared test settings.  The helper modules beside this file (mgh_problems,
ml_losses, bug_corpus) are imported by name: pytest puts this folder on sys.path."""
# pytester's in-process runs restore sys.modules afterwards; C extensions first imported
# inside such a run (numpy.fft through autograd) cannot be loaded a second time, so load
# them here, before any snapshot is taken.
import os

import autograd.numpy  # noqa: F401
import numpy.fft  # noqa: F401
import pytest
from hypothesis import HealthCheck, settings

settings.register_profile("project", deadline=None, max_examples=60,
                          suppress_health_check=[HealthCheck.too_slow])
# In CI the examples are fixed (derandomized), so a red run can be replayed exactly;
# on a developer's machine they vary from run to run and explore more.
settings.register_profile("ci", parent=settings.get_profile("project"), derandomize=True)
settings.load_profile("ci" if os.environ.get("CI") else "project")

pytest_plugins = ["pytester"]


@pytest.fixture(scope="session")
def mgh_derivatives():
    """The module mgh_problems with sympy's differentiation of the whole More, Garbow &
    Hillstrom set done once per session (per worker under xdist), here, so that
    `--durations` shows that one-time cost as this fixture's setup and each test's own
    time apart from it.  Use its exact_gradient(name, x) and float_gradient(name)."""
    import mgh_problems

    mgh_problems.differentiate_all()
    return mgh_problems
