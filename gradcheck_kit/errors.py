"""The two exceptions users meet."""


class CheckInputError(ValueError):
    """The check cannot run: bad params, gradient, options, or a cost that fails at the base point.

    The message names the argument or parameter, what was expected and what was got;
    the user's own exception, if any, is chained as __cause__.
    """


class GradientMismatchError(AssertionError):
    """Raised by assert_gradient_matches; the message is the text report, `.report` the data."""

    def __init__(self, report):
        super().__init__(report.to_text())
        self.report = report


class CheckInterrupted(KeyboardInterrupt):
    """Ctrl-C during a check: `.report` holds the coordinates finished, marked interrupted."""

    def __init__(self, report):
        super().__init__("gradient check interrupted")
        self.report = report


class LongCheckWarning(UserWarning):
    """Issued early in a check whose estimated run time is long; says how to make it shorter.

    The command line prints it on stderr as soon as it is issued; in the API it is a warning
    (and the same sentence is a note of the report).
    """
