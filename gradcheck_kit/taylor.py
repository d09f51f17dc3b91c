"""The Taylor test: does the remainder shrink like h^2 along a random direction?

r(h) = |f(x + h v) - f(x) - h g.v| is O(h^2) when g is the gradient and O(h)
when it is not.  The observed order is the slope of log r against log h over
the smallest steps whose remainder stands well above rounding.  One random
direction checks one combination of coordinates: a pass here does not prove
every coordinate right (compare_gradient does that), but it is cheap, it scales
to any number of parameters, and it catches most wrong gradients.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .analytic import analytic_vector
from .pipeline import prepare

STEPS = 26               # h = 2^-3 ... 2^-28, relative to the coordinates' scales
FIT_POINTS = 6           # smallest usable steps that the order is fitted on
PASS_ORDER = 1.5         # about 2 when right, about 1 when wrong


@dataclass
class TaylorResult:
    order: float                 # fitted order of the remainder (nan if it could not be fitted)
    passed: bool
    steps: np.ndarray            # h values (multiples of the direction, largest first)
    remainders: np.ndarray       # |f(x + h v) - f(x) - h g.v|
    first_order: np.ndarray      # |f(x + h v) - f(x)|, for comparison in a figure
    fitted: np.ndarray           # which steps the order was fitted on
    slope: float                 # g.v, the analytic directional derivative
    evaluations: int
    message: str = ""

    def plot(self, path):
        """Log-log figure of the remainders (needs matplotlib: the `plot` extra)."""
        from .figures import plot_taylor
        return plot_taylor(self, path)

    def __str__(self):
        verdict = "PASS" if self.passed else "FAIL"
        return (f"{verdict} Taylor test: remainder order {self.order:.2f} (2 for a right "
                f"gradient, 1 for a wrong one) over {int(self.fitted.sum())} steps; "
                f"{self.evaluations} evaluations" + (f"; {self.message}" if self.message else ""))


def fit_order(steps, remainders, floor) -> tuple:
    """(order, fitted mask): least-squares slope of log r on log h over the smallest
    FIT_POINTS consecutive steps whose remainder exceeds 1000 * floor."""
    usable = remainders > 1000 * floor
    idx = np.flatnonzero(usable)
    if idx.size < 3:
        return float("nan"), np.zeros(len(steps), dtype=bool)
    # the usable run that reaches the smallest steps
    end = idx[-1]
    start = end
    while start - 1 >= 0 and usable[start - 1] and end - start + 1 < FIT_POINTS:
        start -= 1
    fitted = np.zeros(len(steps), dtype=bool)
    fitted[start:end + 1] = True
    if fitted.sum() < 3:
        return float("nan"), fitted
    slope = np.polyfit(np.log(steps[fitted]), np.log(remainders[fitted]), 1)[0]
    return float(slope), fitted


def taylor_test(cost, params, gradient=None, *, seed=None) -> TaylorResult:
    """Fit the order of the first-order Taylor remainder along one random direction."""
    setup = prepare(cost, params, repeat=False)
    g = analytic_vector(cost, setup.base, setup.layout, gradient)
    return taylor_from_setup(setup, g, seed)


def taylor_from_setup(setup, g, seed=None) -> TaylorResult:
    rng = np.random.default_rng(seed)
    z = rng.standard_normal(setup.base.size)
    v = z * setup.scale / np.max(np.abs(z))
    steps = 2.0 ** -np.arange(3, 3 + STEPS)
    run = setup.runner.run([v] * STEPS, list(steps), label="taylor test")
    f = run.values.real
    slope = float(g @ v)
    remainders = np.abs(f - setup.f0 - steps * slope)
    first = np.abs(f - setup.f0)
    floor = setup.eps_f * np.maximum(abs(setup.f0), np.abs(f)) + setup.line.noise
    order, fitted = fit_order(steps, remainders, floor)
    message = ""
    if run.failures:
        message = f"the cost failed at {len(run.failures)} of the steps"
    if not np.isfinite(order):
        message = message or ("the remainder never rose above rounding: the cost looks linear "
                              "along this direction, so the test cannot tell")
        passed = bool(np.all(remainders <= 1000 * floor))
    else:
        passed = order >= PASS_ORDER
    return TaylorResult(order, passed, steps, remainders, first, fitted, slope,
                        setup.runner.evaluations, message)
