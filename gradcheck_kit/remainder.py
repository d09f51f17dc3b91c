"""The remainder-order check: does the remainder shrink like h^2 along a random direction?

`remainder_order` prepares the cost (its base value and noise, as every check
does) and runs the probe of `reevaluate.remainder_along`, where the method is
described: r(h) = |f(x + h v) - f(x) - h g.v| is O(h^2) for a right gradient and
O(h) for a wrong one.  One direction checks one combination of coordinates: a
pass here does not prove every coordinate right (compare_gradient does that;
errors of mixed signs can cancel along v), but it is cheap, it scales to any
number of parameters, and it catches most wrong gradients.  A test in which no
order could be fitted does not pass, nor does a gradient with NaN or inf entries,
nor a direction that crosses a kink.
"""
from __future__ import annotations

from . import plan
from .analytic import analytic_values
from .errors import interrupts_as_check_interrupted
from .pipeline import prepare
from .reevaluate import PASS_ORDER, RemainderResult, fit_order, remainder_along, step_sizes

__all__ = ["remainder_order", "RemainderResult", "PASS_ORDER", "fit_order", "step_sizes"]


@interrupts_as_check_interrupted("remainder order check")
def remainder_order(cost, params, gradient=None, *, seed=None) -> RemainderResult:
    """Fit the order of the first-order Taylor remainder along one random direction.

    Parameters
    ----------
    cost : callable
        The scalar cost, called as ``cost(params)``.
    params : array, float, or a dict / list / tuple nest of those
        The point.
    gradient : callable, array tree, or None
        The analytic gradient (None: autograd's, from the cost).
    seed : int or None
        Seed of the random direction.

    Returns
    -------
    RemainderResult
        ``.order`` about 2 for a right gradient, about 1 for a wrong one; ``.passed``.

    Raises
    ------
    CheckTypeError, CheckInputError
        Bad params or seed, a cost that fails or is not finite at the point.
    CheckInterrupted
        On Ctrl-C (no partial result: one order needs all the steps).

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> result = gk.remainder_order(lambda x: np.sum(np.sin(x)), np.array([0.3, 0.9]),
    ...                             lambda x: np.cos(x), seed=0)
    >>> result.passed, round(result.order)
    (True, 2)
    """
    plan.check_callable(cost, "cost")
    seed = plan.check_seed(seed)
    setup = prepare(cost, params, repeat=False)
    if setup.runner.interrupted:     # during the noise lines: the gradient is not asked for
        raise setup.runner.stop_error(None, "remainder order check")
    g, eps = analytic_values(cost, setup.base, setup.layout, gradient)
    # autograd's gradient (gradient=None) is taken in the parameters' own precision
    result = remainder_along(setup.runner, setup.base, setup.layout, setup.f0, setup.eps_f,
                             setup.line.noise, g, seed,
                             gradient_eps=None if gradient is None else eps)
    if setup.runner.interrupted:     # an order fitted on the steps reached would mislead
        raise setup.runner.stop_error(None, "remainder order check")
    return result
