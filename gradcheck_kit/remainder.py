"""The remainder-order check: does the remainder shrink like h^2 along a random direction?

r(h) = |f(x + d) - f(x) - g.d|, with d = h v, is O(h^2) when g is the gradient
and O(h) when it is not: r ~ h |e.v| + h^2 |v'Hv| / 2 for a gradient off by e.
A small error shows only at small steps, so the observed order is the slope of
log r against log h over the smallest steps whose remainder stands above
rounding (of the two values, their measured noise, and g's own rounding).
Where that is depends on precision, so the steps fit it: from 2^-1 they reach
down to sqrt(eps) of the cost's values times 2^-8, but never below 16
epsilons of the parameters' own dtype, where a step would be rounded away; d
is the step as the parameters actually store it, rounded to their dtype.

The direction v moves every coordinate by a random half to all of its scale,
with the sign of the analytic gradient there (random where it is zero), so
that g.v is never near zero by chance and an error in scale cannot cancel
along v.  One direction checks one combination of coordinates: a pass here
does not prove every coordinate right (compare_gradient does that; errors of
mixed signs can cancel along v), but it is cheap, it scales to any number of
parameters, and it catches most wrong gradients.  A test in which no order
could be fitted does not pass, nor does a gradient with NaN or inf entries.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .analytic import analytic_values
from .pipeline import prepare
from .tree import coordinate_name

LARGEST_STEP = 1           # steps h = 2^-1, 2^-2, ... (v is relative to the coordinates' scales)
BELOW_SQRT_EPS = 2.0 ** -8   # the smallest step: sqrt(eps of the values) times this ...
ABOVE_PARAM_EPS = 16.0     # ... but at least this many epsilons of the parameters' dtype
ABOVE_ROUNDING = 10.0      # a remainder is usable when this many times its rounding error
FIT_POINTS = 4             # smallest usable consecutive steps that the order is fitted on
MIN_POINTS = 3             # fewer usable steps in that run: no order is fitted
PASS_ORDER = 1.5           # about 2 when right, about 1 when wrong


@dataclass
class RemainderResult:
    order: float                 # fitted order of the remainder (nan if it could not be fitted)
    passed: bool
    steps: np.ndarray            # h values (multiples of the direction, largest first)
    remainders: np.ndarray       # |f(x + d) - f(x) - g.d|, d = h v as the parameters store it
    first_order: np.ndarray      # |f(x + d) - f(x)|, for comparison in a figure
    fitted: np.ndarray           # which steps the order was fitted on
    slope: float                 # g.v, the analytic directional derivative
    evaluations: int
    message: str = ""

    def plot(self, path):
        """Log-log figure of the remainders (needs matplotlib: the `plot` extra)."""
        from .figures import plot_remainder
        return plot_remainder(self, path)

    def __str__(self):
        verdict = "PASS" if self.passed else "FAIL"
        if not np.isfinite(self.order):
            return (f"{verdict} remainder order check: no order fitted; {self.evaluations} evaluations"
                    + (f"; {self.message}" if self.message else ""))
        return (f"{verdict} remainder order check: remainder order {self.order:.2f} (2 for a right "
                f"gradient, 1 for a wrong one) over {int(self.fitted.sum())} steps; "
                f"{self.evaluations} evaluations" + (f"; {self.message}" if self.message else ""))


def step_sizes(eps_values: float, eps_params: float) -> np.ndarray:
    """Powers of two from 2^-LARGEST_STEP down to where the values' precision (at about
    sqrt(eps) the remainder of a right gradient sinks into rounding) or the parameters'
    dtype (a step of a few epsilons is rounded away) leaves nothing to see."""
    smallest = max(np.sqrt(eps_values) * BELOW_SQRT_EPS, ABOVE_PARAM_EPS * eps_params)
    lowest = max(int(np.floor(-np.log2(smallest))), LARGEST_STEP + FIT_POINTS + 1)
    return 2.0 ** -np.arange(LARGEST_STEP, lowest + 1)


def fit_order(steps, remainders, floor) -> tuple:
    """(order, fitted mask): least-squares slope of log r on log h over the smallest
    FIT_POINTS consecutive steps whose remainder exceeds ABOVE_ROUNDING * floor."""
    with np.errstate(invalid="ignore"):
        usable = np.isfinite(remainders) & (remainders > ABOVE_ROUNDING * floor)
    idx = np.flatnonzero(usable)
    fitted = np.zeros(len(steps), dtype=bool)
    if idx.size < MIN_POINTS:
        return float("nan"), fitted
    # the usable run that reaches the smallest steps
    end = idx[-1]
    start = end
    while start - 1 >= 0 and usable[start - 1] and end - start + 1 < FIT_POINTS:
        start -= 1
    fitted[start:end + 1] = True
    if fitted.sum() < MIN_POINTS:
        return float("nan"), fitted
    slope = np.polyfit(np.log(steps[fitted]), np.log(remainders[fitted]), 1)[0]
    return float(slope), fitted


def remainder_order(cost, params, gradient=None, *, seed=None) -> RemainderResult:
    """Fit the order of the first-order Taylor remainder along one random direction."""
    setup = prepare(cost, params, repeat=False)
    g, eps = analytic_values(cost, setup.base, setup.layout, gradient)
    # autograd's gradient (gradient=None) is taken in the parameters' own precision
    return remainder_from_setup(setup, g, seed, gradient_eps=None if gradient is None else eps)


def _stored(point: np.ndarray, layout) -> np.ndarray:
    """The point as the parameters store it: each leaf rounded to its own dtype."""
    out = point.copy()
    for leaf in layout.leaves:
        seg = slice(leaf.offset, leaf.offset + leaf.size)
        out[seg] = point[seg].astype(leaf.dtype).astype(np.float64)
    return out


def _non_finite_message(g: np.ndarray, layout) -> str:
    bad = np.flatnonzero(~np.isfinite(g))
    shown = ", ".join(f"{g[i]} at {coordinate_name(layout, int(i))}" for i in bad[:5])
    return (f"the analytic gradient is not finite ({len(bad)} of {g.size} entries: {shown}"
            + (" ..." if len(bad) > 5 else "") + "): the remainder cannot be formed, and a "
            "gradient with NaN or inf entries is wrong wherever the cost is finite")


def remainder_from_setup(setup, g, seed=None, gradient_eps=None) -> RemainderResult:
    """The test on a prepared cost; gradient_eps is the precision g was computed in
    (None: that of the parameters, the least precise leaf)."""
    layout = setup.layout
    leaf_eps = max(float(np.finfo(leaf.dtype).eps) for leaf in layout.leaves)
    g_eps = leaf_eps if gradient_eps is None else gradient_eps
    steps = step_sizes(setup.eps_f, leaf_eps)
    empty = np.full(len(steps), np.nan)
    none = np.zeros(len(steps), dtype=bool)
    g = np.asarray(g, dtype=np.float64)
    if not np.all(np.isfinite(g)):
        return RemainderResult(float("nan"), False, steps, empty, empty.copy(), none, float("nan"),
                            setup.runner.evaluations, _non_finite_message(g, layout))
    rng = np.random.default_rng(seed)
    # every coordinate takes part, with a random size between half and all of its scale
    sign = np.where(g != 0, np.sign(g), rng.choice([-1.0, 1.0], size=setup.base.size))
    v = sign * rng.uniform(0.5, 1.0, setup.base.size) * setup.scale
    moves = [_stored(setup.base + h * v, layout) - setup.base for h in steps]
    run = setup.runner.run(moves, [1.0] * len(steps), label="remainder order")
    f = run.values.real
    predicted = np.array([g @ d for d in moves])
    remainders = np.abs(f - setup.f0 - predicted)
    first = np.abs(f - setup.f0)
    # rounding of the two values, their noise, and that of g.d from g's own rounding
    with np.errstate(invalid="ignore"):
        floor = (setup.eps_f * np.maximum(abs(setup.f0), np.abs(f)) + setup.line.noise
                 + g_eps * np.array([np.abs(g) @ np.abs(d) for d in moves]))
    order, fitted = fit_order(steps, remainders, floor)
    slope = float(g @ v)
    trouble = []
    if run.failures:
        trouble.append(f"the cost failed at {len(run.failures)} of the {len(steps)} steps")
    undefined = int(np.sum(~np.isfinite(f))) - len(run.failures)
    if undefined:
        trouble.append(f"the cost was not finite at {undefined} of the {len(steps)} steps")
    if np.isfinite(order):
        passed = order >= PASS_ORDER
        message = "; ".join(trouble)
    else:
        passed = False
        with np.errstate(invalid="ignore"):
            above = int(np.sum(remainders > ABOVE_ROUNDING * floor))
        if above == 0 and len(trouble) == 0:
            why = ("the remainder never rose above rounding at any step from "
                   f"2^-{LARGEST_STEP} to 2^-{int(round(-np.log2(steps[-1])))}: the cost is "
                   "linear along this direction, or its values too imprecise for the curvature "
                   "to show, so no order could be fitted and nothing was decided")
        else:
            why = (f"only {above} step{'s' if above != 1 else ''} had a remainder above "
                   "rounding, too few in a row to fit an order, so nothing was decided")
        message = "; ".join([why] + trouble)
    return RemainderResult(order, passed, steps, remainders, first, fitted, slope,
                        setup.runner.evaluations, message)
