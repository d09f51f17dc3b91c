"""Calling the cost again after a check: the remainder-order probe and the step sweep.

Two things need evaluations beyond a check's own stencils: the remainder-order
probe along one random direction (`remainder_along`, used by
`gk.remainder_order`, by compare_gradient when it samples coordinates, and by the
figures) and the step sweep of one coordinate (for the figures).  A report keeps
a `Reevaluation` for them: the cost, the layout, copies of the base point and
the analytic gradient, the steps and method of the check, and three numbers
about the cost's values; nothing else of the check (no runner, no caches) stays
alive with the report.

The remainder-order probe.  r(h) = |f(x + d) - f(x) - g.d|, with d = h v, is
O(h^2) when g is the gradient and O(h) when it is not: r ~ h |e.v| + h^2 |v'Hv| / 2
for a gradient off by e.  A small error shows only at small steps, so the
observed order is the slope of log r against log h over the smallest steps
whose remainder stands above rounding (of the two values, their measured
noise, and g's own rounding).  Where that is depends on precision, so the steps
fit it: from 2^-1 they reach down to sqrt(eps) of the cost's values times 2^-8,
but never below 16 epsilons of the parameters' own dtype, where a step would
be rounded away; d is the step as the parameters actually store it, rounded to
their dtype.

The direction v moves every coordinate by a random half to all of its scale,
with the sign of the analytic gradient there (random where it is zero), so
that g.v is never near zero by chance and an error in scale cannot cancel
along v.  A piecewise-linear cost (ReLU, abs) crossed by the direction at some
step has an O(h) remainder above that step and none below it: a remainder that
falls from far above rounding to rounding in one halving of the step, faster
than any smooth cost allows, is read as a kink, and the order fitted above it
decides nothing.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import stencils
from .evaluate import CostRunner
from .tree import Layout, coordinate_name

LARGEST_STEP = 1           # steps h = 2^-1, 2^-2, ... (v is relative to the coordinates' scales)
BELOW_SQRT_EPS = 2.0 ** -8   # the smallest step: sqrt(eps of the values) times this ...
ABOVE_PARAM_EPS = 16.0     # ... but at least this many epsilons of the parameters' dtype
ABOVE_ROUNDING = 10.0      # a remainder is usable when this many times its rounding error
FIT_POINTS = 4             # smallest usable consecutive steps that the order is fitted on
MIN_POINTS = 3             # fewer usable steps in that run: no order is fitted
PASS_ORDER = 1.5           # about 2 when right, about 1 when wrong
# A kink: the fit predicts, one halving below its smallest step, a remainder this many
# times above rounding, and the cost's remainder there is at rounding instead (a smooth
# cost's remainder shrinks by 2^order per halving, never by a factor of ten or more).
KINK_MARGIN = 100.0
SWEEP_POWERS = 45          # the step sweep spans 2^-1 ... 2^-45 of the coordinate's scale


@dataclass
class RemainderResult:
    """The remainder-order check along one random direction.

    Attributes
    ----------
    order : float
        Fitted order of the remainder (about 2 for a right gradient, 1 for a
        wrong one); nan where none could be fitted.
    passed : bool
        ``order >= 1.5`` and no kink crossed.
    steps : ndarray of float, shape (k,)
        Multiples h of the direction, largest first.
    remainders : ndarray of float, shape (k,)
        |f(x + d) - f(x) - g.d| with d = h v as the parameters store it.
    fitted : ndarray of bool, shape (k,)
        The steps the order was fitted on.
    slope : float
        g.v, the analytic directional derivative.
    evaluations : int
        Cost evaluations spent.
    message : str
        Why nothing was decided, or what went wrong along the way.
    kink_step : float or None
        Where the remainder fell to rounding faster than a smooth cost allows:
        the direction crossed a kink between this step and twice it.
    """

    order: float
    passed: bool
    steps: np.ndarray
    remainders: np.ndarray
    fitted: np.ndarray
    slope: float
    evaluations: int
    message: str = ""
    kink_step: float | None = None

    @property
    def wrong(self) -> bool:
        """The remainder shows a wrong gradient: an order was fitted, below 1.5, no kink."""
        return bool(np.isfinite(self.order) and self.order < PASS_ORDER and
                    self.kink_step is None)

    def plot(self, path):
        """Log-log figure of the remainders (needs matplotlib: the `plot` extra)."""
        from .figures import plot_remainder  # lazy: matplotlib is optional
        return plot_remainder(self, path)

    def __str__(self):
        verdict = "PASS" if self.passed else "FAIL"
        tail = f"; {self.message}" if self.message else ""
        if not np.isfinite(self.order):
            return f"{verdict} remainder order check: no order fitted; {self.evaluations} " \
                   f"evaluations{tail}"
        return (f"{verdict} remainder order check: remainder order {self.order:.2f} (2 for a right "
                f"gradient, 1 for a wrong one) over {int(self.fitted.sum())} steps; "
                f"{self.evaluations} evaluations{tail}")


def step_sizes(eps_values: float, eps_params: float) -> np.ndarray:
    """Steps of the remainder-order probe, largest first.

    Powers of two from 2^-LARGEST_STEP down to where the values' precision (at
    about sqrt(eps) the remainder of a right gradient sinks into rounding) or
    the parameters' dtype (a step of a few epsilons is rounded away) leaves
    nothing to see.

    Parameters
    ----------
    eps_values : float
        Relative precision of the cost's values.
    eps_params : float
        Machine epsilon of the least precise parameter dtype.

    Returns
    -------
    ndarray of float

    Examples
    --------
    >>> s = step_sizes(2.0 ** -52, 2.0 ** -52)
    >>> float(s[0]), bool(s[-1] < 2.0 ** -30)
    (0.5, True)
    """
    smallest = max(np.sqrt(eps_values) * BELOW_SQRT_EPS, ABOVE_PARAM_EPS * eps_params)
    lowest = max(int(np.floor(-np.log2(smallest))), LARGEST_STEP + FIT_POINTS + 1)
    return 2.0 ** -np.arange(LARGEST_STEP, lowest + 1)


def fit_order(steps, remainders, floor) -> tuple:
    """Order of the remainder: the least-squares slope of log r on log h.

    Fitted over the smallest FIT_POINTS consecutive steps whose remainder
    exceeds ABOVE_ROUNDING * floor.

    Parameters
    ----------
    steps, remainders, floor : ndarray of float, shape (k,)

    Returns
    -------
    (float, ndarray of bool)
        The order (nan when fewer than MIN_POINTS steps are usable) and the
        mask of the steps it was fitted on.

    Examples
    --------
    >>> h = 2.0 ** -np.arange(1, 9)
    >>> order, fitted = fit_order(h, 3 * h ** 2, np.full(8, 1e-12))
    >>> round(order, 6), int(fitted.sum())
    (2.0, 4)
    """
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


def kink_below(steps, remainders, floor, order, fitted):
    """The smallest fitted step if, one halving below it, the remainder is at rounding
    where the fit predicts it KINK_MARGIN times above: a kink was crossed there."""
    if not np.isfinite(order) or not fitted.any():
        return None
    last = int(np.flatnonzero(fitted)[-1])
    if last + 1 >= len(steps):
        return None
    predicted = remainders[last] * (steps[last + 1] / steps[last]) ** order
    seen = remainders[last + 1]
    if predicted >= KINK_MARGIN * floor[last + 1] and \
            (not np.isfinite(seen) or seen <= ABOVE_ROUNDING * floor[last + 1]):
        return float(steps[last])
    return None


def _stored(point: np.ndarray, layout: Layout) -> np.ndarray:
    """The point as the parameters store it: each leaf rounded to its own dtype."""
    out = point.copy()
    for leaf in layout.leaves:
        seg = slice(leaf.offset, leaf.offset + leaf.size)
        out[seg] = point[seg].astype(leaf.dtype).astype(np.float64)
    return out


def _non_finite_message(g: np.ndarray, layout: Layout) -> str:
    bad = np.flatnonzero(~np.isfinite(g))
    shown = ", ".join(f"{float(g[i])} at {coordinate_name(layout, int(i))}" for i in bad[:5])
    return (f"the analytic gradient is not finite ({len(bad)} of {g.size} entries: {shown}"
            + (" ..." if len(bad) > 5 else "") + "): the remainder cannot be formed, and a "
            "gradient with NaN or inf entries is wrong wherever the cost is finite")


def remainder_along(runner: CostRunner, base, layout: Layout, f0: float, eps_f: float,
                    noise: float, g, seed=None, gradient_eps=None) -> RemainderResult:
    """The remainder-order probe along one random direction (see the module text).

    Parameters
    ----------
    runner : CostRunner
        Calls the cost near `base`; its evaluation count is the result's.
    base : ndarray of float64, shape (n,)
        The flat point.
    layout : Layout
        How the flat vector maps to the parameters (for dtypes and names).
    f0 : float
        The cost at `base`.
    eps_f : float
        Relative precision of the cost's values.
    noise : float
        Measured absolute noise of one value (0 for none).
    g : array_like of float, shape (n,)
        The analytic gradient, flat.
    seed : int or None
        Seed of the random direction.
    gradient_eps : float or None
        Precision `g` was computed in (None: that of the least precise leaf).

    Returns
    -------
    RemainderResult
    """
    leaf_eps = max(float(np.finfo(leaf.dtype).eps) for leaf in layout.leaves)
    g_eps = leaf_eps if gradient_eps is None else gradient_eps
    steps = step_sizes(eps_f, leaf_eps)
    empty = np.full(len(steps), np.nan)
    none = np.zeros(len(steps), dtype=bool)
    g = np.asarray(g, dtype=np.float64)
    if not np.all(np.isfinite(g)):
        return RemainderResult(float("nan"), False, steps, empty, none,
                               float("nan"), runner.evaluations, _non_finite_message(g, layout))
    rng = np.random.default_rng(seed)
    scale = stencils.scale_of(base)
    # every coordinate takes part, with a random size between half and all of its scale
    sign = np.where(g != 0, np.sign(g), rng.choice([-1.0, 1.0], size=base.size))
    v = sign * rng.uniform(0.5, 1.0, base.size) * scale
    moves = [_stored(base + h * v, layout) - base for h in steps]
    run = runner.run(moves, [1.0] * len(steps), label="remainder order")
    f = run.values.real
    predicted = np.array([g @ d for d in moves])
    remainders = np.abs(f - f0 - predicted)
    # rounding of the two values, their noise, and that of g.d from g's own rounding
    with np.errstate(invalid="ignore"):
        floor = (eps_f * np.maximum(abs(f0), np.abs(f)) + noise
                 + g_eps * np.array([np.abs(g) @ np.abs(d) for d in moves]))
    order, fitted = fit_order(steps, remainders, floor)
    kink = kink_below(steps, remainders, floor, order, fitted)
    slope = float(g @ v)
    trouble = []
    if run.failures:
        trouble.append(f"the cost failed at {len(run.failures)} of the {len(steps)} steps")
    undefined = int(np.sum(~np.isfinite(f))) - len(run.failures)
    if undefined:
        trouble.append(f"the cost was not finite at {undefined} of the {len(steps)} steps")
    if kink is not None:
        passed = False
        message = "; ".join([
            f"the direction crosses a kink between h = {kink / 2:.3g} and {kink:.3g}: the "
            "remainder falls to rounding there, faster than a smooth cost allows, so the "
            f"order {order:.2f} fitted above it comes from the kink and nothing was "
            "decided"] + trouble)
    elif np.isfinite(order):
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
    return RemainderResult(order, passed, steps, remainders, fitted, slope,
                           runner.evaluations, message, kink)


@dataclass(eq=False)
class Reevaluation:
    """What a report's figures need to call the cost again, and nothing more.

    Parameters
    ----------
    cost : callable
        The cost, as the check called it.
    layout : Layout
        How the flat vector maps to the parameters.
    base : ndarray of float64, shape (n,)
        A copy of the flat point.
    analytic : ndarray of float64, shape (n,)
        A copy of the flat analytic gradient.
    steps : ndarray of float64, shape (n,)
        The step of each coordinate in the check's method.
    method : str
        The method the check used.
    f0, eps_f, noise : float
        The cost at `base`, the relative precision of its values, its measured
        absolute noise.
    vectorized : bool
        The cost takes a batch of points (one leading axis on every leaf).

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> report = gk.compare_gradient(lambda x: np.sum(x ** 2), np.array([1.0, 2.0]),
    ...                              lambda x: 2 * x)
    >>> again = report.reevaluation
    >>> again.method, again.base.tolist()
    ('complex-step', [1.0, 2.0])
    """

    cost: object
    layout: Layout
    base: np.ndarray
    analytic: np.ndarray
    steps: np.ndarray
    method: str
    f0: float
    eps_f: float
    noise: float
    vectorized: bool = False

    def _runner(self) -> CostRunner:
        # a fresh runner per use: the report keeps no evaluation state alive
        return CostRunner(self.cost, self.layout, self.base, vectorized=self.vectorized,
                          progress=False)

    def step_sweep(self, flat_index: int, steps=None) -> dict:
        """Derivatives of one coordinate by the check's method over a wide range of steps.

        Parameters
        ----------
        flat_index : int
            The coordinate's position in the flat vector.
        steps : array_like of float, optional
            The steps; default powers of two from 2^-1 to 2^-45 of the
            coordinate's scale (for the complex step down to 1e-20 of it), every
            other one for four-point methods.

        Returns
        -------
        dict
            ``steps``, ``derivatives`` (one per step), ``chosen_step`` (the
            check's step), ``analytic`` (the analytic value), ``method``.
        """
        method = self.method
        s = float(stencils.scale_of(self.base[flat_index:flat_index + 1])[0])
        if steps is None:
            powers = np.arange(1, SWEEP_POWERS + 1, 2 if len(stencils.OFFSETS[method]) > 2 else 1)
            if method == "complex-step":
                powers = np.arange(1, 68, 3)   # down to about 1e-20 of the scale
            steps = s * 2.0 ** -powers
        steps = np.asarray(steps, dtype=float)
        offsets = np.array(stencils.OFFSETS[method])
        where = [flat_index] * (len(steps) * len(offsets))
        amounts = (steps[:, None] * offsets[None, :]).ravel().tolist()
        run = self._runner().run(where, amounts, label="step sweep")
        values = run.values.reshape(len(steps), len(offsets))
        with np.errstate(all="ignore"):
            est = stencils.combine(method, values, steps, np.full(len(steps), s),
                                   stencils.Near(self.f0, self.eps_f, self.noise))
        return {"steps": steps, "derivatives": np.real(est.derivative),
                "chosen_step": float(self.steps[flat_index]),
                "analytic": float(self.analytic[flat_index]), "method": method}

    def remainder(self, seed=None) -> RemainderResult:
        """The remainder-order probe along a random direction (see `remainder_along`)."""
        return remainder_along(self._runner(), self.base, self.layout, self.f0, self.eps_f,
                               self.noise, self.analytic, seed)
