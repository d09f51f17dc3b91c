"""Shared test settings.  The helper modules beside this file (mgh_problems,
ml_losses, bug_corpus) are imported by name: pytest puts this folder on sys.path."""
# pytester's in-process runs restore sys.modules afterwards; C extensions first imported
# inside such a run (numpy.fft through autograd) cannot be loaded a second time, so load
# them here, before any snapshot is taken.
import autograd.numpy  # noqa: F401
import numpy.fft  # noqa: F401
from hypothesis import HealthCheck, settings

settings.register_profile("project", deadline=None, max_examples=60,
                          suppress_health_check=[HealthCheck.too_slow])
settings.load_profile("project")

pytest_plugins = ["pytester"]
