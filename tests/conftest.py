"""Shared test settings.  The helper modules beside this file (mgh_problems,
ml_losses, bug_corpus) are imported by name: pytest puts this folder on sys.path."""
from hypothesis import HealthCheck, settings

settings.register_profile("project", deadline=None, max_examples=60,
                          suppress_health_check=[HealthCheck.too_slow])
settings.load_profile("project")

pytest_plugins = ["pytester"]
