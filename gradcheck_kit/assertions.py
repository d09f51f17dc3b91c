"""Front end for unit tests: assert that a gradient matches, or raise with the report."""
from __future__ import annotations

from .errors import GradientMismatchError
from .pipeline import compare_gradient


def assert_gradient_matches(cost, params, gradient=None, **options):
    """Return the report when every checked coordinate agrees; else raise GradientMismatchError.

    The error is an AssertionError whose message is the text report, so pytest and
    unittest show the diagnosis as the failure.  Options are compare_gradient's.
    """
    report = compare_gradient(cost, params, gradient, **options)
    if not report.passed:
        raise GradientMismatchError(report)
    return report
