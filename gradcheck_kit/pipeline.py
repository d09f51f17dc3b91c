"""The pipeline: params -> tree -> plan -> evaluate -> stencils -> verdicts -> report.

The public checks (`numeric_gradient`, `compare_gradient`) run the stages in
that order; nothing here computes numerics of its own beyond wiring them.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from . import plan, stencils, verdicts
from .analytic import analytic_vector
from .errors import CheckInputError
from .evaluate import CostRunner
from .report import GradientReport, Row
from .tree import Layout, flatten, leaf_eps, locate, rebuild


@dataclass
class Setup:
    """What every check needs after the cost has run once at the base point."""
    runner: CostRunner
    base: np.ndarray
    layout: Layout
    f0: float
    eps_f: float                 # relative precision of the cost's values
    eps: np.ndarray              # per coordinate: max(leaf dtype eps, eps_f), for steps
    scale: np.ndarray
    notes: list = field(default_factory=list)
    problems: list = field(default_factory=list)


def prepare(cost, params, *, vectorized=False, executor=None, progress=None) -> Setup:
    if not callable(cost):
        raise CheckInputError(f"cost: expected a callable taking params, got "
                              f"{type(cost).__name__}")
    base, layout = flatten(params)
    runner = CostRunner(cost, layout, base, vectorized=vectorized, executor=executor,
                        progress=progress)
    f0, _ = runner.at_base()
    eps_f = float(np.finfo(runner.output_dtype).eps)
    eps = np.maximum(leaf_eps(layout), eps_f)
    return Setup(runner, base, layout, f0, eps_f, eps, stencils.scale_of(base))


@dataclass
class Numeric:
    coords: np.ndarray
    estimates: stencils.Estimates
    failed: np.ndarray           # a stencil point raised for this coordinate
    details: list                # text per coordinate ("" when fine)
    done: np.ndarray             # finished before an interrupt


def numeric_derivatives(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray) -> Numeric:
    where, amounts = plan.requests(method, coords, h)
    with warnings.catch_warnings():
        if method == "complex-step":  # a cast that drops the imaginary part is an error here
            warnings.simplefilter("error", np.exceptions.ComplexWarning)
        results = setup.runner.run(where, amounts, label=f"{method} differences")
    k = len(stencils.OFFSETS[method])
    values = results.values.reshape(len(coords), k)
    failed = np.zeros(len(coords), dtype=bool)
    details = [""] * len(coords)
    for number, exc in sorted(results.failures.items()):
        c = number // k
        if not failed[c]:
            details[c] = f"cost raised {type(exc).__name__}: {exc}"
        failed[c] = True
    done = ~np.isnan(values).any(axis=1) | failed
    if not results.interrupted:
        done[:] = True
    est = stencils.combine(method, values, setup.f0, h[coords], setup.eps_f, setup.scale[coords])
    return Numeric(coords, est, failed, details, done)


def resolve_method(setup: Setup, method: str, seed) -> str:
    """'auto': the complex step where a probe shows the cost is complex-safe, else Richardson."""
    if method != "auto":
        return method
    safe, reason = probe_complex_safety(setup, seed)
    if not safe:
        setup.notes.append(f"method auto chose richardson: {reason}")
    return "complex-step" if safe else "richardson"


def probe_complex_safety(setup: Setup, seed) -> tuple:
    """One complex-step and one central difference along a random direction (3 evaluations)."""
    rng = np.random.default_rng(seed if seed is not None else 0)
    z = rng.standard_normal(setup.base.size)
    v = z * setup.scale / np.max(np.abs(z))
    hc = stencils.COMPLEX_STEP
    with warnings.catch_warnings():
        warnings.simplefilter("error", np.exceptions.ComplexWarning)
        complex_run = setup.runner.run([v], [1j * hc], label="complex-step probe")
    if complex_run.failures:
        exc = next(iter(complex_run.failures.values()))
        return False, f"the cost fails at a complex point ({type(exc).__name__}: {exc})"
    t = float(stencils.power_of_two(np.array(np.max(setup.eps) ** (1 / 3))))
    real_run = setup.runner.run([v, v], [t, -t], label="complex-step probe")
    if real_run.failures:
        return False, "the cost fails near the base point"
    return stencils.complex_probe_agrees(complex_run.values[0], real_run.values, setup.f0, hc, t,
                                         setup.eps_f)


def _rows(setup: Setup, numeric: Numeric, analytic: np.ndarray, allowed, verdict) -> list:
    rows = []
    a = analytic[numeric.coords]
    n = numeric.estimates.derivative
    rel = verdicts.relative_error(a, n)
    err = numeric.estimates.error
    for j, flat in enumerate(numeric.coords):
        if not numeric.done[j]:
            continue
        leaf, index = locate(setup.layout, int(flat))
        name = f"{leaf.name}[{', '.join(map(str, index))}]" if index else leaf.name
        rows.append(Row(name, leaf.name, index, int(flat), float(a[j]), float(n[j]),
                        float(abs(a[j] - n[j])), float(rel[j]), float(err[j]), str(verdict[j]),
                        numeric.details[j]))
    return rows


def numeric_gradient(cost, params, *, method="central", step=None, vectorized=False,
                     executor=None):
    """Numerical gradient of a scalar cost, in the structure (and float dtypes) of params."""
    plan.check_method(method)
    setup = prepare(cost, params, vectorized=vectorized, executor=executor)
    method = resolve_method(setup, method, None)
    coords = np.arange(setup.layout.size)
    h = plan.steps(method, setup.base, setup.layout, step, setup.eps)
    numeric = numeric_derivatives(setup, method, coords, h)
    if numeric.failed.any():
        bad = [numeric.details[j] for j in np.flatnonzero(numeric.failed)[:3]]
        warnings.warn(f"numeric_gradient: {int(numeric.failed.sum())} coordinates are NaN because "
                      f"the cost failed near them, e.g. {bad[0]}", RuntimeWarning, stacklevel=2)
    return rebuild(numeric.estimates.derivative.astype(np.float64), setup.layout)


def compare_gradient(cost, params, gradient=None, *, method="auto", step=None, rtol=None,
                     atol=None, coordinates=None, seed=None, executor=None, vectorized=False,
                     progress=None) -> GradientReport:
    """Compare the analytic gradient with numeric derivatives, coordinate by coordinate."""
    plan.check_method(method)
    rtol = plan.check_tolerance(rtol, "rtol")
    atol = plan.check_tolerance(atol, "atol")
    setup = prepare(cost, params, vectorized=vectorized, executor=executor, progress=progress)
    analytic = analytic_vector(cost, setup.base, setup.layout, gradient, vectorized)
    coords = plan.choose_coordinates(setup.layout, coordinates, seed, analytic)
    used = resolve_method(setup, method, seed)
    h = plan.steps(used, setup.base, setup.layout, step, setup.eps)
    numeric = numeric_derivatives(setup, used, coords, h)
    a = analytic[coords]
    est = numeric.estimates
    allowed = verdicts.allowed_difference(a, est.derivative, est.error, f0=setup.f0,
                                          scale=setup.scale[coords], eps_f=setup.eps_f,
                                          rtol=rtol, atol=atol)
    verdict = verdicts.decide(a, est.derivative, allowed, numeric.failed)
    rows = _rows(setup, numeric, analytic, allowed, verdict)
    done = numeric.done
    rtol_s, atol_s = verdicts.suggest_tolerances(a[done], est.derivative[done], verdict[done])
    return GradientReport(rows=rows, method=used, evaluations=setup.runner.evaluations,
                          total=setup.layout.size, notes=setup.notes, problems=setup.problems,
                          suggested_rtol=rtol_s, suggested_atol=atol_s,
                          interrupted=setup.runner.interrupted)
