"""The exceptions users meet, and the one rule for turning Ctrl-C into CheckInterrupted.

Every input problem is a `CheckInputError` (a ValueError); a wrong type is a
`CheckTypeError`, which is both a CheckInputError and a TypeError, so
``except TypeError`` and ``except CheckInputError`` both catch it.
"""
from __future__ import annotations

import functools


class CheckInputError(ValueError):
    """The check cannot run: bad params, gradient, options, or a cost that fails at the base point.

    The message names the argument or parameter, what was expected and what was got;
    the user's own exception, if any, is chained as __cause__.

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> try:
    ...     gk.compare_gradient(lambda x: x @ x, np.ones(2), method="centre")
    ... except gk.CheckInputError as exc:
    ...     print(str(exc).split("got ")[1])
    'centre'; did you mean 'central'?
    """


class CheckTypeError(CheckInputError, TypeError):
    """An argument of the wrong type (a str where a number belongs, a bool for a count, ...).

    A TypeError for callers who sort errors by kind, and a CheckInputError for
    front ends that turn every input problem into one message.

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> try:
    ...     gk.compare_gradient(lambda x: x @ x, np.ones(2), seed=1.5)
    ... except TypeError as exc:
    ...     print(exc)
    seed: expected an int >= 0 or None, got 1.5 (float)
    """


class ExecutorError(CheckInputError):
    """The executor stopped evaluating: a worker process died, `submit` raised, the pool was
    shut down, or `submit` returned something that is not a future.

    The cost's own exceptions never end up here (they become error rows);
    this is the executor failing.

    Attributes
    ----------
    report : GradientReport or None
        The partial report (the coordinates finished before), or None where the check
        had not got that far.
    """

    def __init__(self, message, report=None):
        super().__init__(message)
        self.report = report


class GradientMismatchError(AssertionError):
    """Raised by assert_gradient_matches when the check fails.

    Attributes
    ----------
    report : GradientReport
        The failed check; the exception's message is its text.
    """

    def __init__(self, report):
        super().__init__(report.to_text())
        self.report = report


class CheckInterrupted(KeyboardInterrupt):
    """Ctrl-C during a check.

    A KeyboardInterrupt, so code that stops on Ctrl-C still stops.

    Attributes
    ----------
    report : GradientReport or None
        The coordinates finished, marked interrupted; None when the interrupt came
        before any coordinate could be checked (at the base point, during the noise
        lines) or from a check whose result is not a report (numeric_gradient,
        remainder_order, estimate_noise).
    what : str or None
        The check that was interrupted ("gradient check", "noise estimate", ...).
    evaluations : int or None
        Cost evaluations spent before the interrupt, where known.
    """

    def __init__(self, report=None, what=None, evaluations=None):
        done = f" after {evaluations} evaluations" if evaluations is not None else ""
        kept = "; the partial report is in .report" if report is not None else ""
        super().__init__(f"{what or 'check'} interrupted{done}{kept}")
        self.report, self.what, self.evaluations = report, what, evaluations


def interrupts_as_check_interrupted(what):
    """Decorator for public entry points: a KeyboardInterrupt that arrives outside the
    evaluation loop (in the user's gradient function, in autograd, between two calls)
    leaves as CheckInterrupted too, so callers need to catch one class only.

    Parameters
    ----------
    what : str
        Names the check in the message ("gradient check", "noise estimate", ...).

    Returns
    -------
    callable
        The decorator.

    Examples
    --------
    >>> @interrupts_as_check_interrupted("demo check")
    ... def slow():
    ...     raise KeyboardInterrupt
    >>> try:
    ...     slow()
    ... except CheckInterrupted as exc:
    ...     print(exc, exc.report)
    demo check interrupted None
    """
    def decorate(function):
        @functools.wraps(function)
        def entry(*args, **kwargs):
            try:
                return function(*args, **kwargs)
            except CheckInterrupted as exc:
                if exc.what is not None:
                    raise
                # raised below the entry point (at the base call): name the check
                raise CheckInterrupted(exc.report, what, exc.evaluations) from None
            except KeyboardInterrupt as exc:
                raise CheckInterrupted(None, what) from exc
        return entry
    return decorate


class LongCheckWarning(UserWarning):
    """Issued early in a check whose estimated run time is long; says how to make it shorter.

    The command line prints it on stderr as soon as it is issued; in the API it is a warning
    (and the same sentence is a note of the report).

    Examples
    --------
    >>> import warnings
    >>> with warnings.catch_warnings():
    ...     warnings.simplefilter("error", LongCheckWarning)   # make a long check stop
    """
