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
    curvature_s2: float = 0.0    # typical |f2| * scale^2, seen along the noise line
    line_slope: float = 0.0      # largest |f - f0| / distance along the noise line
    line_third: float = 0.0      # largest |third difference| / t^3 along the noise line
    noise: float = 0.0           # measured noise of the cost's values (absolute)


def prepare(cost, params, *, vectorized=False, executor=None, progress=None) -> Setup:
    if not callable(cost):
        raise CheckInputError(f"cost: expected a callable taking params, got "
                              f"{type(cost).__name__}")
    base, layout = flatten(params)
    runner = CostRunner(cost, layout, base, vectorized=vectorized, executor=executor,
                        progress=progress)
    f0, _ = runner.at_base()
    scale = stencils.scale_of(base)
    noise, line = measure_noise(runner, base, scale, f0)
    curvature_s2 = line_curvature(line, base, scale)
    line_slope = 0.0 if line is None else float(
        np.max(np.abs(line - f0)) / ((len(line) // 2) * stencils.NOISE_SPACING))
    line_third = 0.0 if line is None else float(
        np.max(np.abs(np.diff(line, 3))) / stencils.NOISE_SPACING ** 3)
    eps_f = relative_precision(runner.output_dtype, noise, f0)
    # Steps grow only for costs noisy well beyond rounding (More & Wild, ACM TOMS 38(3),
    # 2012); rounding-level noise enlarged by cancellation only enters the error estimates.
    dtype_eps = float(np.finfo(runner.output_dtype).eps)
    eps = np.maximum(leaf_eps(layout), eps_f if eps_f > NOISY_ABOVE * dtype_eps else dtype_eps)
    return Setup(runner, base, layout, f0, eps_f, eps, scale, noise=noise,
                 curvature_s2=curvature_s2, line_slope=line_slope, line_third=line_third)


def line_curvature(line, base, scale) -> float:
    """|f2| * scale^2, typical over coordinates, from the ends of the noise line.

    It stands in for a coordinate's second derivative where a stencil sees none
    (complex step, one-sided differences) when sizing errors and gradient terms.
    """
    if line is None:
        return 0.0
    v = noise_direction(base.size, scale)
    t = (len(line) // 2) * stencils.NOISE_SPACING
    along = stencils.directional_curvature((line[-1], line[0]), line[len(line) // 2], t)
    return along / float(np.sum((v / scale) ** 2))


def relative_precision(dtype, noise: float, f0: float) -> float:
    """eps_f: the dtype's epsilon, or the measured noise relative to |f0| where larger
    (capped at 1e-3: beyond that no step gives a useful derivative anyway)."""
    eps = float(np.finfo(dtype).eps)
    relative = noise / abs(f0) if f0 != 0 else 0.0
    return float(min(max(eps, relative), max(eps, 1e-3)))


def noise_direction(size: int, scale: np.ndarray, seed=0) -> np.ndarray:
    """A random direction with entries of random sign and size between scale/4 and scale.

    Entries are powers of two, so with a power-of-two spacing every point on the
    line is exact even in float32 leaves: rounding the inputs would look like noise.
    """
    rng = np.random.default_rng(seed)
    sign = rng.choice([-1.0, 1.0], size=size)
    return sign * stencils.power_of_two(scale * rng.uniform(0.5, 1.0, size=size))


def measure_noise(runner: CostRunner, base, scale, f0, seed=0) -> tuple:
    """(noise level, values) from NOISE_POINTS cost values along a random line."""
    v = noise_direction(base.size, scale, seed)
    half = stencils.NOISE_POINTS // 2
    offsets = [j * stencils.NOISE_SPACING for j in range(-half, half + 1) if j != 0]
    run = runner.run([v] * len(offsets), offsets, label="noise probe")
    if run.failures:
        return 0.0, None
    values = np.concatenate([run.values[:half], [f0], run.values[half:]]).real
    return stencils.noise_from_values(values)[0], values


@dataclass
class Numeric:
    coords: np.ndarray
    estimates: stencils.Estimates
    failed: np.ndarray           # a stencil point raised for this coordinate
    details: list                # text per coordinate ("" when fine)
    done: np.ndarray             # finished before an interrupt


# Five-point and Richardson redo a coordinate with a shorter step when the gap to their
# embedded lower-order value is above this fraction of the gradient's term size (see
# verdicts.term_scale) and dominates rounding: the automatic step max(|x|, 1) * eps^(1/5)
# was too long for the coordinate's curvature (e.g. x4, x5 of Osborne 1 in More, Garbow
# & Hillstrom, whose cost varies on a scale of 1/300 in them).
REFINE_ABOVE = 1e-7
NOISY_ABOVE = 1e4   # relative noise this many epsilons above rounding counts as noise


def numeric_derivatives(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray,
                        refine: bool = True) -> Numeric:
    """Numeric derivatives at `coords`; fourth-order methods refine badly scaled ones once."""
    numeric = _one_pass(setup, method, coords, h)
    if method not in stencils.REFINABLE or not refine or setup.runner.interrupted:
        return numeric
    est = numeric.estimates
    terms = term_scale(setup, numeric)
    redo = (est.gap > REFINE_ABOVE * terms) & (est.gap > 64 * est.rounding) & ~numeric.failed
    if not redo.any():
        return numeric
    idx = np.flatnonzero(redo)
    h2 = h.copy()
    h2[coords[idx]] = stencils.refined_steps(
        stencils.Estimates(*(getattr(est, f)[idx] for f in
                             ("derivative", "truncation", "rounding", "curvature", "gap"))),
        h[coords[idx]])
    second = _one_pass(setup, method, coords[idx], h2)
    first_d = est.derivative[idx].copy()
    use, error = stencils.pick_refined(
        stencils.Estimates(*(getattr(est, f)[idx] for f in
                             ("derivative", "truncation", "rounding", "curvature", "gap"))),
        second.estimates, terms[idx])
    use &= ~second.failed & second.done
    take = idx[use]
    for f in ("derivative", "truncation", "rounding", "curvature", "gap"):
        getattr(est, f)[take] = getattr(second.estimates, f)[use]
    # Two extrapolations at different steps: their distance bounds the error of the
    # better one, usually far more tightly than the single-step estimate.
    ok = ~second.failed & second.done
    est.truncation[idx[ok]] = np.minimum(est.truncation[idx[ok]],
                                         np.abs(first_d - second.estimates.derivative)[ok])
    return numeric


def _one_pass(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray) -> Numeric:
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
    s = setup.scale[coords]
    est = stencils.combine(method, values, setup.f0, h[coords], setup.eps_f, s, setup.noise,
                           setup.curvature_s2 / s ** 2, setup.line_third / s ** 3)
    return Numeric(coords, est, failed, details, done)


def term_scale(setup: Setup, numeric: Numeric) -> np.ndarray:
    """Per coordinate, the size of the terms a gradient entry is summed from (see verdicts)."""
    est = numeric.estimates
    s = setup.scale[numeric.coords]
    return verdicts.term_scale(est.derivative, setup.f0, s,
                               np.maximum(est.curvature * s + setup.curvature_s2 / s,
                                          setup.line_slope / s))


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
    real_run = setup.runner.run([v] * 4, [t, -t, 2 * t, -2 * t], label="complex-step probe")
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
    allowed = verdicts.allowed_difference(a, est.derivative, est.error,
                                          terms=term_scale(setup, numeric), eps_f=setup.eps_f,
                                          rtol=rtol, atol=atol)
    verdict = verdicts.decide(a, est.derivative, allowed, numeric.failed)
    rows = _rows(setup, numeric, analytic, allowed, verdict)
    done = numeric.done
    rtol_s, atol_s = verdicts.suggest_tolerances(a[done], est.derivative[done], verdict[done])
    return GradientReport(rows=rows, method=used, evaluations=setup.runner.evaluations,
                          total=setup.layout.size, notes=setup.notes, problems=setup.problems,
                          suggested_rtol=rtol_s, suggested_atol=atol_s,
                          interrupted=setup.runner.interrupted)
