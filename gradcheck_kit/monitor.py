"""A gradient check that rides along with an optimizer.

Many gradient bugs show only in part of parameter space (after ReLU units die,
once a clipping or safe-log branch switches on, late in training), so a check at
the starting point misses them.  `GradientMonitor.observe(params, g, step=...)`
is called once per optimizer step; at chosen steps it checks g along a few
random directions with the directional stencil of products.py (five cost
evaluations for the first direction, four for each further one), and at the
first step whose check fails it runs a per-coordinate check (gk.compare_gradient,
or gk.locate_mismatches for large parameters) to name the wrong coordinates.

Checked steps: every `every` steps, or (every=None) spread so that the monitor
stays below `budget` times the run it watches, both in time (measured as it
goes) and in evaluations (each observed step counting as one): the first
observed step is always checked and charged, and a next check waits until the
run has paid for everything spent so far plus the largest check seen.
Directions are drawn from a generator seeded by (seed, step), so a check is
reproducible at a saved point; the caller's arrays are only read, and numpy's,
Python's and torch's global random streams are set back after the cost has been
called.

Params and g may hold torch tensors, a torch.nn.Module or JAX arrays: a check
then runs on float64 numpy copies through the adapter of frameworks.py (the
cost gets framework values at every call, gradient=None is the framework's own
autodiff), and the caller's tensors, module state, .grad and modes are set back.
"""
from __future__ import annotations

import math
import numbers
import os
import random
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import CheckInputError
from .frameworks import framework_of
from .products import FAILING, ProbeError, check_seed, judge_along, random_direction, step_for
from .report import write_atomically
from .tree import coordinate_name, flatten, flatten_like, rebuild

DEFAULT_DIRECTIONS = 2
# Above this many coordinates the per-coordinate check is a group search
# (gk.locate_mismatches), below it a full gk.compare_gradient.
FULL_CHECK_UP_TO = 500
SEARCH_EVALUATIONS = 2000    # evaluations the group search may spend
INLINE_VALUES_UP_TO = 20000  # a written case holds its values inline up to this many numbers
TABLE_ROWS = 12


@dataclass
class Direction:
    """One direction of a check: g . v against the stencil's derivative along v."""
    analytic: float
    numeric: float
    error_estimate: float        # the allowed difference (error estimate and rounding of g . v)
    verdict: str
    step: float
    detail: str = ""


@dataclass
class StepRow:
    """One checked step of a monitored run."""
    step: int
    verdict: str
    relative_error: float        # |g.v - numeric| / max(|g.v|, |numeric|), worst direction
    error_estimate: float        # the allowed difference relative to the same size
    analytic: float              # g . v of the worst direction
    numeric: float
    evaluations: int
    directions: list = field(default_factory=list)
    detail: str = ""
    noise: float = 0.0           # noise of the cost seen here, relative to |f|

    @property
    def failing(self) -> bool:
        return self.verdict in FAILING


class _Streams:
    """numpy's and Python's global random states (and torch's, if loaded), set back later:
    a cost that draws from them must not shift the optimizer's stream."""

    def __enter__(self):
        self.np_state = np.random.get_state()
        self.py_state = random.getstate()
        torch = sys.modules.get("torch")
        self.torch_state = torch.random.get_rng_state() if torch is not None and \
            hasattr(torch, "random") else None
        return self

    def __exit__(self, *exc):
        np.random.set_state(self.np_state)
        random.setstate(self.py_state)
        if self.torch_state is not None:
            sys.modules["torch"].random.set_rng_state(self.torch_state)
        return False


class _Counted:
    """The cost, counting its calls (the monitor's evaluations)."""

    def __init__(self, cost, into=None):
        self.cost = cost
        self.into = into if into is not None else self   # the counter the calls go to
        self.calls = 0
        self.__name__ = getattr(cost, "__name__", "cost")

    def __call__(self, params):
        self.into.calls += 1
        return self.cost(params)


def _check_options(cost, gradient, every, budget, seed, directions):
    if not callable(cost):
        raise CheckInputError(f"cost: expected a callable taking params, got "
                              f"{type(cost).__name__}")
    if gradient is not None and not callable(gradient):
        raise CheckInputError(f"gradient: expected a function of params or None (autograd), got "
                              f"{type(gradient).__name__}; a fixed gradient value cannot follow "
                              "a run: pass g to observe() instead")
    if every is not None and (isinstance(every, (bool, np.bool_)) or
                              not isinstance(every, numbers.Integral) or every < 1):
        raise CheckInputError(f"every: expected None or an int >= 1 (check every that many "
                              f"steps), got {every!r}")
    if isinstance(budget, (bool, np.bool_)) or not isinstance(budget, numbers.Real) or \
            not math.isfinite(budget) or budget <= 0:
        raise CheckInputError(f"budget: expected a number > 0 (the monitor's share of the "
                              f"run's time, e.g. 0.05), got {budget!r}")
    check_seed(seed)
    if isinstance(directions, (bool, np.bool_)) or not isinstance(directions, numbers.Integral) \
            or directions < 1:
        raise CheckInputError(f"directions: expected an int >= 1, got {directions!r}")


class GradientMonitor:
    """Check the gradient along an optimizer's own trajectory, at a small, stated cost.

    Parameters
    ----------
    cost : callable
        params -> a scalar: the function the optimizer minimises.
    gradient : callable or None
        params -> gradient; used where observe() gets no g (and by `callback`).
        None: autograd's gradient of `cost` (torch.autograd's or jax.grad's
        when params hold framework values).
    every : int or None
        Check every that many steps; None spreads the checks so that the
        monitor stays below `budget` times the run, in time and in evaluations.
    budget : float
        The monitor's share of the run (0.05: 5%): of its time, measured as it
        goes, and of its evaluations, each observed step counting as one.
    seed : int or None
        Seed of the random directions (with the step); None draws one, shown in
        the report.
    directions : int
        Random directions per check (5 evaluations for the first, 4 per further one).
    name_coordinates : bool
        At the first step whose check fails, run a per-coordinate check.

    Examples
    --------
    >>> import numpy as np
    >>> monitor = GradientMonitor(lambda x: np.sum(x ** 4), every=5, seed=0)
    >>> x = np.array([1.0, -0.5])
    >>> for step in range(20):
    ...     g = 4 * x ** 3
    ...     _ = monitor.observe(x, g, step=step)
    ...     x = x - 0.05 * g
    >>> monitor.report().checked_steps
    [0, 5, 10, 15]
    """

    def __init__(self, cost, gradient=None, *, every=None, budget=0.05, seed=None,
                 directions=DEFAULT_DIRECTIONS, name_coordinates=True):
        _check_options(cost, gradient, every, budget, seed, directions)
        self.cost = _Counted(cost)
        self.gradient = gradient
        self.every = None if every is None else int(every)
        self.budget = float(budget)
        self.seed = int(seed) if seed is not None else \
            int(np.random.SeedSequence().generate_state(1)[0])
        self.directions = int(directions)
        self.name_coordinates = bool(name_coordinates)
        self.rows: list = []
        self.notes: list = []
        self.saved = None
        self.coordinate_report = None
        self.last_step = None
        self.steps_seen = 0
        self.gradient_calls = 0
        self._run_time = 0.0
        self._monitor_time = 0.0
        self._left_at = None
        self._largest_check_time = 0.0
        self._largest_check_calls = 0
        self._last_checked = None

    # --- the optimizer's side -----------------------------------------------------
    def observe(self, params, g=None, step=None):
        """Note one optimizer step; check the gradient there when a check is due.

        Parameters
        ----------
        params : array, float, or a dict / list / tuple nest of those
            The parameters at this step (only read; copied where kept).  Torch
            tensors, a torch.nn.Module or JAX arrays (or nests of them) too.
        g : same structure as params, or None
            The gradient the optimizer uses here; None: `gradient(params)`,
            computed only when a check is due.  For a module: the module itself
            (its parameters' .grad is read) or a dict by parameter name.
        step : int or None
            The step number (increasing); None: one more than the last.

        Returns
        -------
        StepRow or None
            The row of this step when it was checked.

        Raises
        ------
        CheckInputError
            A step that does not increase, params or g of the wrong structure.
        """
        arrived = time.perf_counter()
        if self._left_at is not None:
            self._run_time += arrived - self._left_at
        step = self._next_step(step)
        row = None
        try:
            if self._due(step):
                started, spent = time.perf_counter(), self._spent()
                row = self._check_step(params, g, step)
                self._largest_check_time = max(self._largest_check_time,
                                               time.perf_counter() - started)
                self._largest_check_calls = max(self._largest_check_calls,
                                                self._spent() - spent)
        finally:
            self._left_at = time.perf_counter()
            self._monitor_time += self._left_at - arrived
        return row

    def callback(self, xk, *state):
        """For scipy.optimize.minimize(..., callback=monitor.callback).

        scipy calls it after each iteration with the current point (or an
        OptimizeResult holding it); step k is the point after iteration k.
        The gradient there comes from `gradient` (autograd when None).

        Parameters
        ----------
        xk : ndarray or scipy.optimize.OptimizeResult
        *state
            Further arguments some methods pass; ignored.

        Returns
        -------
        None
        """
        x = getattr(xk, "x", xk)
        step = 1 if self.last_step is None else self.last_step + 1
        self.observe(np.array(x, dtype=float, copy=True), None, step=step)

    def _next_step(self, step):
        if step is None:
            step = 0 if self.last_step is None else self.last_step + 1
        elif isinstance(step, (bool, np.bool_)) or not isinstance(step, numbers.Integral):
            raise CheckInputError(f"step: expected an int or None, got {step!r}")
        step = int(step)
        if self.last_step is not None and step <= self.last_step:
            raise CheckInputError(f"step: expected a step after the last one observed "
                                  f"({self.last_step}), got {step}")
        self.last_step = step
        self.steps_seen += 1
        return step

    def _due(self, step) -> bool:
        if self._last_checked is None:
            return True
        if self.every is not None:
            return step - self._last_checked >= self.every
        return budget_allows(self.budget, self._run_time, self._monitor_time,
                             self._largest_check_time, self._spent(),
                             self._largest_check_calls, self.steps_seen)

    def _spent(self) -> int:
        """The monitor's evaluations: cost calls, and gradients it computed itself."""
        return self.cost.calls + self.gradient_calls

    # --- the check ------------------------------------------------------------------
    def _check_step(self, params, g, step) -> StepRow:
        self._last_checked = step
        kind = framework_of(params)
        if kind is not None:
            return self._check_framework_step(kind, params, g, step)
        base, layout = flatten(params)
        from_function = g is None
        with _Streams():
            if g is None:
                g = self._gradient_at(base, layout)
            g_flat = flatten_like(g, layout, "g")
            row = check_point(self.cost, base, layout, g_flat, step, self.seed,
                              self.directions)
            self._record(row, base, layout, g_flat, from_function, self.cost, None)
        return row

    def _check_framework_step(self, kind, params, g, step) -> StepRow:
        """The check on float64 numpy copies of torch / JAX values (frameworks.adapt): the
        cost is called on framework values, gradient=None is the framework's autodiff, and
        the caller's tensors, modules (their state, modes, .grad) and random streams are
        set back as they were."""
        from .frameworks import ModuleGuard, adapt

        from_function = g is None
        with ModuleGuard(params) as guard, _Streams():
            analytic = self.gradient if from_function else _observed_gradient(g)
            try:   # the counted cost: adapt's own call at the base point is the monitor's too
                adapted = adapt(kind, _Counted(self.cost.cost, into=self.cost), params,
                                analytic, scalar=True, analytic_name="gradient",
                                keep_precision=False, options={})
            except CheckInputError as exc:
                raise CheckInputError(f"observe at step {step}: {exc}") from exc
            if from_function:
                self.gradient_calls += 1
            base, layout = flatten(adapted.params)
            g_flat = flatten_like(adapted.analytic, layout, "g")
            row = check_point(adapted.cost, base, layout, g_flat, step, self.seed,
                              self.directions)
            self._record(row, base, layout, g_flat, from_function, adapted.cost, kind)
        for note in adapted.notes + guard.notes:
            if note not in self.notes:
                self.notes.append(note)
        return row

    def _record(self, row, base, layout, g_flat, from_function, counted, framework):
        self.rows.append(row)
        if not row.failing or self.saved is not None:
            return
        self.saved = SavedPoint(row.step, rebuild(base.copy(), layout),
                                rebuild(g_flat.copy(), layout), self.cost.cost,
                                self.gradient, from_function, self.seed, self.directions,
                                row.verdict, framework=framework,
                                engine_cost=counted if framework else None)
        if self.name_coordinates:
            try:
                self.coordinate_report = self.saved.compare(counted=counted)
            except CheckInputError as exc:
                self.notes.append(f"the per-coordinate check at step {row.step} could "
                                  f"not run: {exc}")

    def _gradient_at(self, base, layout):
        self.gradient_calls += 1
        params = rebuild(base.copy(), layout)
        if self.gradient is not None:
            try:
                return self.gradient(params)
            except Exception as exc:
                raise CheckInputError(f"gradient raised {type(exc).__name__} at step "
                                      f"{self.last_step}: {exc}") from exc
        try:
            import autograd
            return autograd.grad(self.cost.cost)(params)
        except Exception as exc:
            raise CheckInputError(f"gradient=None: autograd could not differentiate the cost "
                                  f"({type(exc).__name__}: {exc}); pass gradient= or g") from exc

    # --- the report -----------------------------------------------------------------
    def report(self) -> "MonitorReport":
        """The rows so far, the first failing step, the saved point and the cost.

        Returns
        -------
        MonitorReport
        """
        first = next((r.step for r in self.rows if r.failing), None)
        before = [r.step for r in self.rows if r.verdict == "agree" and
                  (first is None or r.step < first)]
        overhead = self._monitor_time / self._run_time if self._run_time > 0 else None
        return MonitorReport(rows=list(self.rows), first_wrong_step=first,
                             last_right_step=before[-1] if before else None,
                             saved=self.saved, coordinate_report=self.coordinate_report,
                             steps_seen=self.steps_seen, evaluations=self.cost.calls,
                             gradient_calls=self.gradient_calls, budget=self.budget,
                             every=self.every, overhead=overhead, seed=self.seed,
                             directions=self.directions, monitor_time=self._monitor_time,
                             run_time=self._run_time, notes=list(self.notes))


def budget_allows(budget, run_time, monitor_time, check_time, spent, check_spent,
                  steps) -> bool:
    """Whether one more check keeps the monitor within its budget, in time and in
    evaluations, counting everything it has spent so far (the first check included,
    so the next check waits until the run has paid it back).

    The next check is taken to cost as much as the largest one seen (a check that
    meets a mismatch retries its steps).  In evaluations, each observed step counts
    as one evaluation of the run: the step computed a gradient, and a gradient
    costs at least one cost evaluation (reverse mode costs a small multiple of one:
    common practice), so the share in evaluations is an upper bound.

    Parameters
    ----------
    budget : float
        The monitor's share of the run (0.05: 5%).
    run_time, monitor_time, check_time : float
        Seconds spent by the run outside the monitor, by the monitor, and by its
        largest check.
    spent, check_spent : int
        Cost evaluations and gradients spent by the monitor, and by its largest check.
    steps : int
        Steps observed.

    Returns
    -------
    bool

    Examples
    --------
    >>> budget_allows(0.05, 10.0, 0.2, 0.1, 9, 9, 400)   # 18 of 5% of 400 steps
    True
    >>> budget_allows(0.05, 10.0, 0.2, 0.1, 9, 9, 300)   # 18 > 15: not paid back yet
    False
    >>> budget_allows(0.05, 1.0, 0.05, 0.01, 9, 9, 900)  # 6% of the run's time
    False
    """
    if monitor_time + check_time > budget * run_time:
        return False
    return spent + check_spent <= budget * steps


def _observed_gradient(g):
    """g as framework values the adapter reads: a torch module stands for the .grad of
    its trainable parameters (a dict by name), copied."""
    torch = sys.modules.get("torch")
    if torch is not None and isinstance(g, torch.nn.Module):
        out = {}
        for name, p in g.named_parameters():
            if not p.requires_grad:
                continue
            if p.grad is None:
                raise CheckInputError(
                    f"g: the module's parameter '{name}' has no .grad; call backward() on the "
                    "loss before observe(), or pass g=None for torch.autograd's gradient")
            out[name] = p.grad.detach().clone()
        return out
    if isinstance(g, dict):
        return type(g)((k, _observed_gradient(v)) for k, v in g.items())
    if isinstance(g, (list, tuple)) and not hasattr(g, "_fields"):
        return type(g)(_observed_gradient(v) for v in g)
    return g


def _cost_value(cost, params, label):
    try:
        value = cost(params)
    except Exception as exc:
        raise ProbeError(f"the cost raised {type(exc).__name__} {label}: {exc}") from exc
    array = np.asarray(value)
    if array.size != 1:
        raise CheckInputError(f"cost: expected a scalar, got an array of shape {array.shape}")
    if np.iscomplexobj(array) or not np.issubdtype(array.dtype, np.number):
        raise CheckInputError(f"cost: expected a real number, got {array.dtype} values")
    return float(array.reshape(())), array.dtype


def _eps_of(dtype) -> float:
    return float(np.finfo(dtype).eps) if np.issubdtype(dtype, np.floating) else \
        float(np.finfo(np.float64).eps)


def _leaf_precision(layout) -> float:
    return max(float(np.finfo(leaf.dtype).eps) for leaf in layout.leaves)


def check_point(cost, base, layout, g_flat, step, seed, directions=DEFAULT_DIRECTIONS) -> StepRow:
    """The directional check at one point: g . v against the stencil along v.

    Parameters
    ----------
    cost : callable
        params -> scalar.
    base : ndarray
        The point, flat (see tree.flatten); `layout` rebuilds it.
    layout : tree.Layout
    g_flat : ndarray
        The gradient claimed there, flat.
    step : int
        The step number: with `seed` it fixes the directions.
    seed : int
    directions : int

    Returns
    -------
    StepRow

    Examples
    --------
    >>> import numpy as np
    >>> x, layout = flatten(np.array([0.3, -1.2]))
    >>> check_point(lambda p: np.sum(np.cos(p)), x, layout, -np.sin(x), 0, 0).verdict
    'agree'
    """
    evaluations = 0
    bad_params = np.flatnonzero(~np.isfinite(base))
    bad_g = np.flatnonzero(~np.isfinite(g_flat))
    if bad_params.size or bad_g.size:
        which = "params" if bad_params.size else "g"
        where = bad_params if bad_params.size else bad_g
        names = ", ".join(coordinate_name(layout, int(i)) for i in where[:3])
        return StepRow(step, "non-finite", math.inf, math.nan, math.nan, math.nan, 0, [],
                       f"{which} holds non-finite entries ({names}"
                       + (" ..." if where.size > 3 else "") + ")")
    try:
        f0, dtype = _cost_value(cost, rebuild(base.copy(), layout), "at the point")
    except ProbeError as exc:
        return StepRow(step, "error", math.inf, math.nan, math.nan, math.nan, 1, [], str(exc))
    evaluations += 1
    if not math.isfinite(f0):
        return StepRow(step, "non-finite", math.inf, math.nan, math.nan, math.nan, 1, [],
                       f"the cost is {f0} at this point")
    # The step follows the precision of the values and leaves, not a noise level seen at
    # earlier steps: a kink of f'' near the path looks like noise to the difference table,
    # and a step lengthened for it would meet more kinks.
    eps_f = max(_eps_of(dtype), _leaf_precision(layout))
    h = step_for(eps_f)
    rng = np.random.default_rng([seed, step])
    low_precision = any(leaf.dtype != np.float64 for leaf in layout.leaves)
    results, relative_noise_seen = [], 0.0
    for k in range(directions):
        v = random_direction(rng, base)
        analytic = float(g_flat @ v)
        terms = float(np.sum(np.abs(g_flat * v)))

        def along(t, v=v, k=k):
            value, _ = _cost_value(cost, rebuild(base + t * v, layout),
                                   f"at t = {t:.3g} along direction {k + 1}")
            return np.array([value])

        extra = _input_rounding(base, layout, v, g_flat) if low_precision else None
        j = judge_along(along, np.array([f0]), np.array([analytic]), h, terms=terms,
                        eps_f=eps_f, extra_error=extra)
        evaluations += j.evaluations
        relative_noise_seen = max(relative_noise_seen, j.noise / abs(f0) if f0 else 0.0)
        results.append(Direction(analytic, float(j.numeric[0]), float(j.allowed[0]),
                                 j.verdict, j.step, j.detail))
    worst = max(results, key=_badness)
    size = max(abs(worst.analytic), abs(worst.numeric))
    relative = abs(worst.analytic - worst.numeric) / size if size > 0 else 0.0
    verdict = min((d.verdict for d in results), key=_SEVERITY.index)
    detail = worst.detail if worst.verdict == verdict else next(
        d.detail for d in results if d.verdict == verdict)
    return StepRow(step, verdict, relative,
                   worst.error_estimate / size if size > 0 else math.inf, worst.analytic,
                   worst.numeric, evaluations, results, detail, relative_noise_seen)


_SEVERITY = ("disagree", "non-finite", "error", "kink", "noisy", "agree")


def _badness(d: Direction):
    over = abs(d.analytic - d.numeric) / d.error_estimate if d.error_estimate > 0 else math.inf
    return (-_SEVERITY.index(d.verdict), over if math.isfinite(over) else 1e300)


def _input_rounding(base, layout, v, g_flat):
    """h -> error of the stencil from rounding x + t v to lower-precision leaves: the
    gradient times each point's rounding, weighted by the stencil's weights."""
    from .products import OFFSETS, WEIGHTS

    def extra(h):
        total = 0.0
        for t, w in zip(OFFSETS, WEIGHTS):
            nominal = base + t * h * v
            realised, _ = flatten(rebuild(nominal.copy(), layout))
            total += abs(w / h) * abs(float(g_flat @ (realised - nominal)))
        return np.array([total])
    return extra


# --- the saved point ------------------------------------------------------------------

@dataclass
class SavedPoint:
    """The parameters and gradient at the first step whose check failed."""
    step: int
    params: object               # a copy, in the structure the optimizer used
    gradient_values: object      # the gradient observed there, same structure
    cost: object = field(repr=False)
    gradient: object = field(repr=False)   # the monitor's gradient function (or None)
    from_function: bool = False  # gradient_values came from `gradient` (or autograd)
    seed: int = 0
    directions: int = DEFAULT_DIRECTIONS
    verdict: str = "disagree"
    framework: str | None = None   # 'torch' / 'jax': params are numpy copies of those values
    engine_cost: object = field(default=None, repr=False)   # the cost on those numpy copies

    def recheck(self) -> StepRow:
        """The same directional check again at this point (the same directions).

        Returns
        -------
        StepRow
        """
        base, layout = flatten(self.params)
        g_flat = flatten_like(self.gradient_values, layout, "gradient")
        cost = self.engine_cost if self.engine_cost is not None else self.cost
        with _Streams():
            return check_point(cost, base, layout, g_flat, self.step, self.seed,
                               self.directions)

    def compare(self, counted=None, **options):
        """A per-coordinate check of the observed gradient at this point.

        Up to FULL_CHECK_UP_TO coordinates, gk.compare_gradient; above, the group
        search gk.locate_mismatches with SEARCH_EVALUATIONS evaluations.

        Parameters
        ----------
        counted : callable or None
            The cost to call (the monitor passes its counting wrapper).
        **options
            Passed on to compare_gradient or locate_mismatches.

        Returns
        -------
        GradientReport
        """
        from .locate import locate_mismatches
        from .pipeline import compare_gradient

        cost = counted if counted is not None else (
            self.engine_cost if self.engine_cost is not None else self.cost)
        base, layout = flatten(self.params)
        options.setdefault("seed", self.seed)
        if layout.size <= FULL_CHECK_UP_TO:
            return compare_gradient(cost, self.params, self.gradient_values, **options)
        options.setdefault("budget", SEARCH_EVALUATIONS)
        return locate_mismatches(cost, self.params, self.gradient_values, **options)

    def write_npz(self, path) -> Path:
        """Write the parameters to an .npz file, one array per leaf, keyed by its name.

        A dict of arrays loads back as it was (`dict(np.load(path))`, or the
        command line's --params); a bare array is stored under 'x'; nested
        structures are keyed by dotted names ('layers.0.b').

        Parameters
        ----------
        path : str or Path

        Returns
        -------
        Path
        """
        path = Path(path)
        base, layout = flatten(self.params)
        arrays = {leaf.name: np.array(base[leaf.offset:leaf.offset + leaf.size],
                                      dtype=leaf.dtype).reshape(leaf.shape)
                  for leaf in layout.leaves}
        with open(path, "wb") as fh:
            np.savez(fh, **arrays)
        return path

    def write_case(self, path, *, cost=None, gradient=None, name=None) -> Path:
        """Write a module declaring a `@gk.case` at this point, ready for pytest or the CLI.

        Parameters
        ----------
        path : str or Path
            The .py file to write.  Above INLINE_VALUES_UP_TO numbers the values go
            to an .npz of the same name beside it.
        cost, gradient : str or None
            'package.module:name' or 'path/file.py:name' of the cost and of the
            gradient function to import; None: the monitored functions' own
            module and name.  Without a gradient function (observe() was given
            g values) the case checks the observed values.
        name : str or None
            The case's name; default 'at_step_<step>'.

        Returns
        -------
        Path

        Raises
        ------
        CheckInputError
            The cost cannot be imported by name (a lambda or a local function)
            and `cost` does not name it.
        """
        path = Path(path)
        if self.framework is not None:
            raise CheckInputError(f"write_case: the point holds numpy copies of {self.framework} "
                                  "values, which the monitored cost does not take; write them "
                                  "with write_npz(path) and declare the case in your own "
                                  "framework code")
        if path.suffix != ".py":
            raise CheckInputError(f"path: expected a .py file for the case module, got "
                                  f"{path.name}")
        name = name or f"at_step_{self.step}"
        if not name.isidentifier():
            raise CheckInputError(f"name: expected a Python identifier, got {name!r}")
        cost_import = _import_lines("_cost", cost, self.cost, "cost")
        grad_ref = gradient if gradient is not None else (
            self.gradient if self.from_function and self.gradient is not None else None)
        lines = ['"""A gradient check at step %d of a monitored run, where the directional '
                 'check' % self.step,
                 f'first failed ({self.verdict}); written by gradcheck_kit\'s GradientMonitor.',
                 "",
                 "Check it with `gradcheck-kit check THIS_FILE` or collect it with pytest.",
                 '"""', "import numpy as np", "", "import gradcheck_kit as gk"]
        lines += cost_import
        base, layout = flatten(self.params)
        big = base.size > INLINE_VALUES_UP_TO
        if big:
            lines += ["from pathlib import Path", "",
                      '_VALUES = np.load(Path(__file__).with_suffix(".npz"), allow_pickle=False)']
        if grad_ref is not None:
            lines += _import_lines("_gradient", grad_ref, grad_ref, "gradient")
            gradient_expr = "_gradient"
        elif self.from_function:
            gradient_expr = "None"      # autograd derived it in the monitor, as it will here
        else:
            gradient_expr = "GRADIENT"
        arrays = {}
        lines += ["", "", "# the parameters at that step, exactly",
                  f"PARAMS = {_literal(self.params, 'p', arrays, big)}"]
        if gradient_expr == "GRADIENT":
            lines += ["# the gradient values observed there (name a gradient function with",
                      "# write_case(gradient='module:name') to check the function instead)",
                      f"GRADIENT = {_literal(self.gradient_values, 'g', arrays, big)}"]
        lines += ["", "",
                  f"@gk.case(gradient={gradient_expr}, params=PARAMS, seed={self.seed})",
                  f"def {name}(params):", "    return _cost(params)", ""]
        if big:
            with open(path.with_suffix(".npz"), "wb") as fh:
                np.savez(fh, **arrays)
        write_atomically(path, "\n".join(lines))
        return path


def _import_lines(alias, reference, function, what) -> list:
    """Lines that import the function as `alias`: from a 'module:name' or 'file.py:name'
    string, or from the function's own module and name."""
    if isinstance(reference, str):
        where, sep, attr = reference.rpartition(":")
        if not sep or not where or not attr.isidentifier():
            raise CheckInputError(f"{what}: expected 'package.module:name' or "
                                  f"'path/file.py:name', got {reference!r}")
    else:
        attr = getattr(function, "__name__", "")
        qualname = getattr(function, "__qualname__", attr)
        module = getattr(function, "__module__", None)
        if not attr.isidentifier() or qualname != attr or module is None:
            raise CheckInputError(
                f"write_case: the {what} {qualname!r} cannot be imported by name (a lambda, a "
                f"method or a local function); pass {what}='package.module:name' naming a "
                "module-level function that computes it")
        where = module
        if module == "__main__":
            main = sys.modules.get("__main__")
            file = getattr(main, "__file__", None)
            if file is None:
                raise CheckInputError(f"write_case: the {what} was defined interactively; pass "
                                      f"{what}='package.module:name'")
            where = os.path.abspath(file)
    if where.endswith(".py"):
        return ["import importlib.util", "",
                "# loaded from its file (its `if __name__ == '__main__':` part does not run)",
                f"_spec{alias} = importlib.util.spec_from_file_location('_monitored{alias}', "
                f"{where!r})",
                f"_module{alias} = importlib.util.module_from_spec(_spec{alias})",
                f"_spec{alias}.loader.exec_module(_module{alias})",
                f"{alias} = _module{alias}.{attr}"]
    return [f"from {where} import {attr} as {alias}"]


def _number(x: float) -> str:
    x = float(x)
    return repr(x) if math.isfinite(x) else f'float("{x}")'


def _literal(tree, prefix, arrays, big, path=()) -> str:
    """Python source that rebuilds `tree` exactly (float repr round-trips); with big=True
    the arrays are stored in `arrays` and read from _VALUES."""
    if isinstance(tree, dict):
        items = ", ".join(f"{k!r}: {_literal(v, prefix, arrays, big, path + (k,))}"
                          for k, v in tree.items())
        return "{" + items + "}"
    if isinstance(tree, (list, tuple)):
        items = [_literal(v, prefix, arrays, big, path + (i,)) for i, v in enumerate(tree)]
        if isinstance(tree, tuple):
            return "(" + ", ".join(items) + ("," if len(items) == 1 else "") + ")"
        return "[" + ", ".join(items) + "]"
    if isinstance(tree, float):
        return _number(tree)
    array = np.asarray(tree)
    dtype = array.dtype.name
    if big and array.ndim > 0:
        key = f"{prefix}{len(arrays)}"
        arrays[key] = array
        return f'_VALUES["{key}"]'
    if array.ndim == 0:
        return f"np.{dtype}({_number(array)})"
    values = ", ".join(_number(x) for x in array.ravel())
    return f'np.array([{values}], dtype="{dtype}").reshape({tuple(array.shape)!r})'


# --- the report -----------------------------------------------------------------------

@dataclass
class MonitorReport:
    """What a GradientMonitor saw: one row per checked step, and where things went wrong.

    Attributes
    ----------
    rows : list of StepRow
        One per checked step: its directions, relative errors and verdict.
    first_wrong_step, last_right_step : int or None
        The first step whose check disagreed, and the last checked step before it that
        agreed (the bug appeared in between).
    saved : SavedPoint or None
        The parameters at the first wrong step (`.write_npz`, `.write_case`, `.recheck`).
    coordinate_report : GradientReport or None
        The per-coordinate check run at the first wrong step.
    steps_seen, evaluations, gradient_calls : int
        Steps observed; cost evaluations and gradients the monitor spent itself.
    budget, overhead : float
        The share of the run's time allowed, and the share measured.
    every : int or None
        The fixed schedule, where one was given.
    passed : bool
        No checked step disagreed.
    """
    rows: list
    first_wrong_step: int | None
    last_right_step: int | None
    saved: SavedPoint | None
    coordinate_report: object
    steps_seen: int
    evaluations: int             # cost evaluations spent by the monitor
    gradient_calls: int          # gradients it computed itself (observe without g)
    budget: float
    every: int | None
    overhead: float | None       # the monitor's time / the run's time
    seed: int
    directions: int
    monitor_time: float = 0.0
    run_time: float = 0.0
    notes: list = field(default_factory=list)

    @property
    def passed(self) -> bool:
        return self.first_wrong_step is None

    @property
    def checked_steps(self) -> list:
        return [r.step for r in self.rows]

    @property
    def counts(self) -> dict:
        out = {}
        for r in self.rows:
            out[r.verdict] = out.get(r.verdict, 0) + 1
        return out

    def summary_line(self) -> str:
        head = "PASS" if self.passed else "FAIL"
        if self.passed:
            what = f"no checked step fails ({_counts_text(self.counts)})" if self.rows else \
                "nothing checked yet"
        else:
            since = (f", last right at step {self.last_right_step}"
                     if self.last_right_step is not None else "")
            what = f"the gradient went wrong at step {self.first_wrong_step}{since}"
        cost = f"{self.evaluations} evaluations"
        if self.overhead is not None:
            cost += f", {100 * self.overhead:.1f}% of the run's time (budget " \
                    f"{100 * self.budget:g}%)"
        schedule = f"every {self.every} steps" if self.every else "spread by the budget"
        return (f"{head} gradient monitor: {what}; {len(self.rows)} of {self.steps_seen} steps "
                f"checked ({schedule}, {self.directions} directions each, seed {self.seed}); "
                f"{cost}")

    def to_text(self, max_rows: int = TABLE_ROWS) -> str:
        lines = [self.summary_line()]
        if self.rows:
            lines.append(f"  {'step':>8}  {'verdict':<10}  {'rel error':>9}  {'est error':>9}  "
                         f"{'g.v':>14}  {'numeric':>14}")
            for r in _shown_rows(self.rows, self.first_wrong_step, max_rows):
                if r is None:
                    lines.append(f"  {'...':>8}")
                    continue
                lines.append(f"  {r.step:>8}  {r.verdict:<10}  {_fmt(r.relative_error, 1):>9}  "
                             f"{_fmt(r.error_estimate, 1):>9}  {_fmt(r.analytic):>14}  "
                             f"{_fmt(r.numeric):>14}" + (f"  {r.detail}" if r.detail and
                                                          r.verdict != "agree" else ""))
        if self.saved is not None:
            lines.append(f"  saved: the parameters at step {self.saved.step} "
                         "(report.saved.write_case(path) writes a @gk.case module, "
                         ".write_npz(path) the arrays)")
        lines += [f"  note: {n}" for n in self.notes]
        if self.coordinate_report is not None:
            lines.append(f"  per-coordinate check at step {self.saved.step}:")
            lines += ["    " + t for t in self.coordinate_report.to_text().split("\n")]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.to_text()

    def to_dict(self) -> dict:
        def number(x):
            return float(x) if x is not None and math.isfinite(x) else None
        return {
            "schema": "gradcheck_kit/monitor-report", "schema_version": 1,
            "passed": self.passed, "first_wrong_step": self.first_wrong_step,
            "last_right_step": self.last_right_step, "steps_seen": self.steps_seen,
            "checked": len(self.rows), "evaluations": self.evaluations,
            "gradient_calls": self.gradient_calls, "budget": self.budget, "every": self.every,
            "overhead": number(self.overhead), "seed": self.seed, "directions": self.directions,
            "counts": self.counts,
            "rows": [{"step": r.step, "verdict": r.verdict,
                      "relative_error": number(r.relative_error),
                      "error_estimate": number(r.error_estimate), "analytic": number(r.analytic),
                      "numeric": number(r.numeric), "evaluations": r.evaluations,
                      "detail": r.detail} for r in self.rows],
            "coordinate_report": None if self.coordinate_report is None else
            self.coordinate_report.to_dict(),
        }

    def plot(self, path=None):
        """Draw the directional relative error over the checked steps.

        Needs matplotlib (the `plot` extra); draws on a Figure of its own with
        the Agg canvas, so the caller's pyplot state and backend are untouched.

        Parameters
        ----------
        path : str or Path or None
            Where to write the figure; None: only return it.

        Returns
        -------
        matplotlib.figure.Figure

        Raises
        ------
        CheckInputError
            matplotlib is not installed, or nothing was checked.
        """
        try:
            from matplotlib.backends.backend_agg import FigureCanvasAgg
            from matplotlib.figure import Figure
        except ImportError as exc:
            raise CheckInputError("the monitor's plot needs matplotlib: pip install "
                                  "'gradcheck_kit[plot]'") from exc
        if not self.rows:
            raise CheckInputError("plot: no step has been checked yet")
        fig = Figure(figsize=(7, 3.6))
        FigureCanvasAgg(fig)
        ax = fig.add_subplot(1, 1, 1)
        floor = 1e-17
        steps = [r.step for r in self.rows]
        rel = [max(r.relative_error, floor) if math.isfinite(r.relative_error) else 1.0
               for r in self.rows]
        est = [max(r.error_estimate, floor) if math.isfinite(r.error_estimate) else np.nan
               for r in self.rows]
        ax.semilogy(steps, rel, "o-", color="0.1", markersize=3, label="relative error of g.v")
        ax.semilogy(steps, est, "--", color="0.55", label="allowed (error estimate)")
        letters = {"disagree": "D", "kink": "K", "noisy": "N", "error": "E", "non-finite": "E"}
        for s, y, r in zip(steps, rel, self.rows):
            if r.verdict in letters:
                ax.annotate(letters[r.verdict], (s, y), textcoords="offset points",
                            xytext=(0, 5), ha="center", fontsize=8)
        if self.first_wrong_step is not None:
            ax.axvline(self.first_wrong_step, color="0.3", linestyle=":",
                       label=f"first wrong step ({self.first_wrong_step})")
        ax.set_xlabel("optimizer step")
        ax.set_ylabel("directional relative error")
        ax.set_title("gradient monitor (letters: D disagree, K kink, N noisy, E error)",
                     fontsize=9)
        ax.legend(fontsize=8, loc="best")
        fig.tight_layout()
        if path is not None:
            fig.savefig(os.fspath(path), dpi=100)
        return fig


def _counts_text(counts) -> str:
    return ", ".join(f"{n} {v}" for v, n in sorted(counts.items()))


def _shown_rows(rows, first_wrong, max_rows):
    """All rows if few; else the first ones, those around the first failure, the last."""
    if len(rows) <= max_rows:
        return rows
    keep = set(range(3)) | set(range(len(rows) - 3, len(rows)))
    if first_wrong is not None:
        k = next(i for i, r in enumerate(rows) if r.step == first_wrong)
        keep |= set(range(max(0, k - 2), min(len(rows), k + 3)))
    out, last = [], -1
    for i in sorted(keep):
        if i != last + 1:
            out.append(None)
        out.append(rows[i])
        last = i
    return out


def _fmt(x, digits=6):
    if x is None:
        return "-"
    return f"{x:.{digits}e}" if math.isfinite(x) else str(x)


__all__ = ["GradientMonitor", "MonitorReport", "StepRow", "Direction", "SavedPoint",
           "check_point"]
