"""Front end for unit tests: assert that a gradient matches, or raise with the report."""
from __future__ import annotations

from .errors import GradientMismatchError
from .pipeline import compare_gradient


def assert_gradient_matches(cost, params, gradient=None, **options):
    """Return the report when every checked coordinate agrees; else raise.

    Parameters
    ----------
    cost : callable
        ``cost(params) -> float``.
    params : array, float, or dict / list / tuple nest of those
        The point at which to check.
    gradient : callable, values like params, or None
        The analytic gradient; None lets the cost's autodiff derive it.
    **options
        Keyword options of `compare_gradient` (method, rtol, atol, seed, ...).

    Returns
    -------
    GradientReport
        The passing report.

    Raises
    ------
    GradientMismatchError
        An AssertionError whose message is the text report (so pytest and unittest
        show the diagnosis as the failure) and whose ``.report`` is the data.  The
        pytest plugin also lists it under "gradient checks that failed".
    CheckInputError
        The check cannot run (bad params, gradient or options).

    Examples
    --------
    >>> import numpy as np
    >>> assert_gradient_matches(lambda x: np.sum(x ** 2), np.ones(3), lambda x: 2 * x).passed
    True
    """
    __tracebackhide__ = True   # pytest: show the caller's line and the report, not this frame
    report = compare_gradient(cost, params, gradient, **options)
    if not report.passed:
        raise GradientMismatchError(report)
    return report
