"""Front end for unit tests: assert that a gradient matches, or raise with the report."""
from __future__ import annotations

import difflib
import inspect

from .errors import CheckTypeError, GradientMismatchError
from .pipeline import compare_gradient


def check_option_names(options: dict, where: str) -> None:
    """Refuse an option compare_gradient does not take, naming the nearest one.

    Examples
    --------
    >>> try:
    ...     check_option_names({"methd": "central"}, "assert_gradient_matches")
    ... except TypeError as exc:
    ...     print(exc)
    assert_gradient_matches: unknown option 'methd'; did you mean 'method'?
    """
    __tracebackhide__ = True
    known = [n for n, p in inspect.signature(compare_gradient).parameters.items()
             if p.kind == p.KEYWORD_ONLY]
    for name in options:
        if name not in known:
            near = difflib.get_close_matches(name, known, n=1)
            hint = (f"; did you mean {near[0]!r}?" if near
                    else f"; expected one of {', '.join(known)}")
            raise CheckTypeError(f"{where}: unknown option {name!r}{hint}")


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
        The check cannot run (bad params, gradient or options; an unknown option is
        named, with the nearest known one).

    Examples
    --------
    >>> import numpy as np
    >>> assert_gradient_matches(lambda x: np.sum(x ** 2), np.ones(3), lambda x: 2 * x).passed
    True
    """
    __tracebackhide__ = True   # pytest: show the caller's line and the report, not this frame
    check_option_names(options, "assert_gradient_matches")
    report = compare_gradient(cost, params, gradient, **options)
    if not report.passed:
        raise GradientMismatchError(report)
    return report
