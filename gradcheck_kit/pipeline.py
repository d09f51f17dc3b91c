"""The pipeline: params -> tree -> plan -> evaluate -> stencils -> verdicts -> report.

The public checks (`numeric_gradient`, `compare_gradient`, `estimate_noise`) run
the stages in that order; this module wires them and computes no numerics of
its own beyond choosing what to evaluate next.
"""
from __future__ import annotations

import sys
import warnings
from dataclasses import dataclass, field

import numpy as np

from . import plan, stencils, verdicts
from .analytic import analytic_vector
from .errors import CheckInputError, CheckInterrupted
from .evaluate import CostRunner
from .report import GradientReport, Row
from .tree import Layout, coordinate_name, entry_name, flatten, leaf_eps, locate, rebuild

# Five-point and Richardson redo a coordinate with a shorter step when the gap to their
# embedded lower-order value is above this fraction of the gradient's term size (see
# verdicts.term_scale) and dominates rounding: the automatic step max(|x|, 1) * eps^(1/5)
# was too long for the coordinate's curvature (e.g. x4, x5 of Osborne 1 in More, Garbow
# & Hillstrom, whose cost varies on a scale of 1/300 in them).
REFINE_ABOVE = 1e-7
NOISY_ABOVE = 1e4        # relative noise this many epsilons above rounding counts as noise
REPEAT_TOLERANCE = 10.0  # two calls at one point may differ by this many eps (threaded sums)


@dataclass
class Setup:
    """What every check needs after the cost has run at the base point and its noise line."""
    runner: CostRunner
    base: np.ndarray
    layout: Layout
    f0: float
    eps_f: float                 # relative precision of the cost's values
    eps: np.ndarray              # per coordinate: max(leaf dtype eps, eps_f), for steps
    scale: np.ndarray
    line: stencils.LineFeatures
    noisy: bool                  # noise well above rounding: steps were enlarged for it
    notes: list = field(default_factory=list)
    problems: list = field(default_factory=list)


def prepare(cost, params, *, vectorized=False, executor=None, progress=None,
            repeat=True) -> Setup:
    """Check the inputs, call the cost at the base point (twice) and along the noise line."""
    if not callable(cost):
        raise CheckInputError(f"cost: expected a callable taking params, got "
                              f"{type(cost).__name__}")
    base, layout = flatten(params)
    runner = CostRunner(cost, layout, base, vectorized=vectorized, executor=executor,
                        progress=progress)
    f0, after = runner.at_base()
    notes, problems = [], []
    changed = runner.changed_leaves(after)
    if changed:
        notes.append(f"the cost modifies its input in place (it changed {', '.join(changed)} "
                     "during a call); every call here gets its own copy, so your arrays are "
                     "unchanged, but code that reuses the arrays after calling the cost is not")
    if repeat:
        again, _ = runner.at_base("at the base point, called a second time")
        if abs(again - f0) > REPEAT_TOLERANCE * np.finfo(float).eps * max(abs(f0), abs(again)):
            problems.append(
                f"the cost is not deterministic: two calls at the same parameters returned "
                f"{f0!r} and {again!r} (difference {abs(again - f0):.3g}, relative "
                f"{abs(again - f0) / max(abs(f0), abs(again), 1e-300):.3g}). Numeric derivatives "
                "of a random cost are meaningless: seed its random generator, fix the "
                "mini-batch, and switch off dropout or sampling before checking the gradient")
    scale = stencils.scale_of(base)
    dtype_eps = float(np.finfo(runner.output_dtype).eps)
    line = measure_line(runner, base, scale, f0, max(dtype_eps, float(np.max(leaf_eps(layout)))))
    eps_f = relative_precision(runner.output_dtype, line.noise,
                               float(np.max(np.abs(line.values), initial=abs(f0))))
    noisy = eps_f > NOISY_ABOVE * dtype_eps
    # Steps grow only for costs noisy well beyond rounding (More & Wild, ACM TOMS 38(3),
    # 2012); rounding-level noise enlarged by cancellation only enters the error estimates.
    eps = np.maximum(leaf_eps(layout), eps_f if noisy else dtype_eps)
    notes += precision_notes(runner.output_dtype, layout)
    if noisy:
        notes.append(f"the cost is noisy: its values carry noise of about {line.noise:.2g} "
                     f"({eps_f:.2g} relative, measured along a line after More & Wild); steps "
                     "and error estimates allow for it")
    return Setup(runner, base, layout, f0, eps_f, eps, scale, line, noisy, notes, problems)


def precision_notes(output_dtype, layout: Layout) -> list:
    notes = []
    if np.finfo(output_dtype).eps > np.finfo(np.float64).eps:
        notes.append(f"the cost returns {np.dtype(output_dtype).name} values: steps and error "
                     f"estimates use its precision (eps {np.finfo(output_dtype).eps:.3g}), so "
                     "agreement means less than in float64")
    low = [leaf.name for leaf in layout.leaves if leaf.dtype != np.float64]
    if low:
        notes.append(f"parameters {', '.join(low)} are stored in lower precision; their "
                     "steps are sized for it")
    return notes


def relative_precision(dtype, noise: float, size: float) -> float:
    """eps_f: the dtype's epsilon, or the measured noise relative to the size of the
    cost's values near the point, where larger (capped at 1e-3: beyond that no step
    gives a useful derivative anyway)."""
    eps = float(np.finfo(dtype).eps)
    relative = noise / size if size != 0 else 0.0
    return float(min(max(eps, relative), max(eps, 1e-3)))


def noise_direction(size: int, scale: np.ndarray, seed=0) -> np.ndarray:
    """A random direction with entries of random sign and size between scale/4 and scale.

    Entries are powers of two, so with a power-of-two spacing every point on the
    line is exact even in float32 leaves: rounding the inputs would look like noise.
    """
    rng = np.random.default_rng(seed)
    sign = rng.choice([-1.0, 1.0], size=size)
    return sign * stencils.power_of_two(scale * rng.uniform(0.5, 1.0, size=size))


def measure_line(runner: CostRunner, base, scale, f0, eps, seed=0) -> stencils.LineFeatures:
    """Cost values at NOISE_POINTS equally spaced points along a random line."""
    v = noise_direction(base.size, scale, seed)
    t = stencils.noise_spacing(eps)
    half = stencils.NOISE_POINTS // 2
    offsets = [j * t for j in range(-half, half + 1) if j != 0]
    run = runner.run([v] * len(offsets), offsets, label="noise probe")
    if run.failures:
        return stencils.LineFeatures.none()
    values = np.concatenate([run.values[:half], [f0], run.values[half:]]).real
    return stencils.line_features(values, t, float(np.sum((v / scale) ** 2)))


@dataclass
class Numeric:
    coords: np.ndarray
    h: np.ndarray                # step of each coordinate (first pass)
    values: np.ndarray           # (coordinates, offsets) cost values of the first pass
    estimates: stencils.Estimates
    failed: np.ndarray           # a stencil point raised for this coordinate
    details: list                # text per coordinate ("" when fine)
    done: np.ndarray             # finished before an interrupt
    method: str


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
    h2[coords[idx]] = stencils.refined_steps(est.take(idx), h[coords[idx]])
    second = _one_pass(setup, method, coords[idx], h2)
    ok = ~second.failed & second.done
    use = stencils.pick_refined(est.take(idx), second.estimates, terms[idx]) & ok
    first_d = est.derivative[idx].copy()
    est.put(idx[use], second.estimates.take(np.flatnonzero(use)))
    # The chosen value's error: the distance between the two values, or its own modelled
    # truncation (plus its rounding, kept), whichever is larger.
    chosen = est.take(idx)
    modelled = stencils.extrapolation_error(chosen, terms[idx]) - chosen.rounding
    distance = np.abs(first_d - second.estimates.derivative)
    est.truncation[idx[ok]] = np.maximum(distance, modelled)[ok]
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
    est = stencils.combine(method, values, setup.f0, h[coords], setup.eps_f, s, setup.line.noise,
                           setup.line.curvature_s2 / s ** 2, 8 * setup.line.third / s ** 3)
    return Numeric(coords, h[coords], values, est, failed, details, done, method)


def term_scale(setup: Setup, numeric: Numeric) -> np.ndarray:
    """Per coordinate, the size of the terms a gradient entry is summed from (see verdicts)."""
    est = numeric.estimates
    s = setup.scale[numeric.coords]
    seen = np.maximum(est.curvature * s + setup.line.curvature_s2 / s, setup.line.slope / s)
    return verdicts.term_scale(est.derivative, setup.f0, s, seen)


def resolve_method(setup: Setup, method: str, seed) -> str:
    """'auto': the complex step where a probe shows the cost is complex-safe, else Richardson.

    A noisy cost gets Richardson with noise-sized steps: the complex step would
    differentiate the noise itself."""
    if method != "auto":
        return method
    if setup.noisy:
        setup.notes.append("method auto chose richardson: the cost is noisy")
        return "richardson"
    safe, reason = probe_complex_safety(setup, seed)
    if not safe:
        setup.notes.append(f"method auto chose richardson: {reason}")
    return "complex-step" if safe else "richardson"


def probe_complex_safety(setup: Setup, seed) -> tuple:
    """One complex-step and four real evaluations along a random direction."""
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


def numeric_gradient(cost, params, *, method="central", step=None, vectorized=False,
                     executor=None):
    """Numerical gradient of a scalar cost, in the structure (and float dtypes) of params."""
    plan.check_method(method)
    plan.check_flags(vectorized=vectorized)
    setup = prepare(cost, params, vectorized=vectorized, executor=executor, repeat=False)
    method = resolve_method(setup, method, None)
    coords = np.arange(setup.layout.size)
    h = plan.steps(method, setup.base, setup.layout, step, setup.eps)
    numeric = numeric_derivatives(setup, method, coords, h, refine=step is None)
    if numeric.failed.any():
        bad = [numeric.details[j] for j in np.flatnonzero(numeric.failed)[:3]]
        warnings.warn(f"numeric_gradient: {int(numeric.failed.sum())} coordinates are NaN because "
                      f"the cost failed near them, e.g. {bad[0]}", RuntimeWarning, stacklevel=2)
    return rebuild(numeric.estimates.derivative.astype(np.float64), setup.layout)


@dataclass
class Comparison:
    """Everything a verdict needs, per checked coordinate (arrays aligned with coords)."""
    numeric: Numeric
    analytic: np.ndarray         # the full analytic vector
    allowed: np.ndarray
    verdict: np.ndarray
    kinks: stencils.Kinks
    details: list


def compare(setup: Setup, numeric: Numeric, analytic: np.ndarray, rtol, atol) -> Comparison:
    a = analytic[numeric.coords]
    est = numeric.estimates
    allowed = verdicts.allowed_difference(a, est.derivative, est.error,
                                          terms=term_scale(setup, numeric), eps_f=setup.eps_f,
                                          rtol=rtol, atol=atol)
    verdict = verdicts.decide(a, est.derivative, allowed, numeric.failed)
    kinks = stencils.find_kinks(numeric.method, numeric.values, setup.f0, numeric.h, est.noise)
    details = list(numeric.details)
    verdict = verdicts.apply_kinks(verdict, a, kinks, allowed, details)
    if setup.noisy:
        verdict = verdicts.mark_noisy(verdict, a, est, details, setup.line.noise)
    return Comparison(numeric, analytic, allowed, verdict, kinks, details)


def second_opinion(setup: Setup, first: Comparison, rtol, atol) -> Comparison:
    """Recheck complex-step mismatches with real Richardson differences.

    The complex step cannot see a kink (it never leaves the point) and is wrong
    where a cost is complex-safe in general but not in one coordinate; four real
    evaluations per mismatch settle both.  Coordinates that Richardson passes,
    or finds at a kink, take its verdict; the rest keep the complex step's.
    """
    bad = np.flatnonzero(np.isin(first.verdict, ("disagree", "non-finite")))
    if first.numeric.method != "complex-step" or bad.size == 0 or setup.runner.interrupted:
        return first
    coords = first.numeric.coords[bad]
    h = plan.steps("richardson", setup.base, setup.layout, None, setup.eps)
    again = compare(setup, numeric_derivatives(setup, "richardson", coords, h),
                    first.analytic, rtol, atol)
    settled = np.isin(again.verdict, ("agree", "kink"))
    if not settled.any():
        return first
    num = first.numeric
    num.estimates.put(bad[settled], again.numeric.estimates.take(np.flatnonzero(settled)))
    first.verdict[bad[settled]] = again.verdict[settled]
    first.allowed[bad[settled]] = again.allowed[settled]
    for j, k in zip(bad[settled], np.flatnonzero(settled)):
        first.details[j] = again.details[k] or "decided by real differences"
    names = [coordinate_name(setup.layout, int(c)) for c in coords[settled]]
    setup.notes.append(f"{len(names)} coordinates where the complex step disagreed were "
                       f"rechecked with real differences and pass: {', '.join(names[:5])}"
                       + (" ..." if len(names) > 5 else ""))
    return first


def rows_of(setup: Setup, comp: Comparison) -> list:
    num = comp.numeric
    a = comp.analytic[num.coords]
    n = num.estimates.derivative
    rel = verdicts.relative_error(a, n)
    err = num.estimates.error
    rows = []
    for j, flat in enumerate(num.coords):
        if not num.done[j]:
            continue
        leaf, index = locate(setup.layout, int(flat))
        rows.append(Row(entry_name(leaf, index), leaf.name, index, int(flat), float(a[j]), float(n[j]),
                        float(abs(a[j] - n[j])), float(rel[j]), float(err[j]),
                        str(comp.verdict[j]), comp.details[j]))
    return rows


def descent_note(setup: Setup, analytic: np.ndarray):
    """A small step against a nonzero gradient must lower the cost (2 evaluations).

    The step moves each coordinate by at most 1e-4 of its scale; a change below
    the cost's noise proves nothing and is not reported.
    """
    g = analytic
    size = float(np.max(np.abs(g) * setup.scale)) if np.all(np.isfinite(g)) else 0.0
    if size == 0.0:
        return None
    t = 1e-4 / size
    run = setup.runner.run([-g * setup.scale ** 2, g * setup.scale ** 2], [t, t],
                           label="descent check")
    if run.failures:
        return None
    down, up = run.values.real - setup.f0
    expected = t * float(np.sum((g * setup.scale) ** 2))
    resolvable = expected > 100 * max(setup.line.noise, setup.eps_f * abs(setup.f0))
    if resolvable and down > 0 and up < 0:
        return ("descent: a small step against the analytic gradient raises the cost and a step "
                "along it lowers it: it points uphill, so gradient descent would climb")
    return None


def compare_gradient(cost, params, gradient=None, *, method="auto", step=None, rtol=None,
                     atol=None, coordinates=None, seed=None, executor=None, vectorized=False,
                     progress=None) -> GradientReport:
    """Compare the analytic gradient with numeric derivatives, coordinate by coordinate."""
    plan.check_method(method)
    plan.check_flags(seed=seed, progress=progress, vectorized=vectorized)
    rtol = plan.check_tolerance(rtol, "rtol")
    atol = plan.check_tolerance(atol, "atol")
    setup = prepare(cost, params, vectorized=vectorized, executor=executor, progress=progress)
    analytic = analytic_vector(cost, setup.base, setup.layout, gradient, vectorized)
    if setup.problems:  # a random cost: no coordinate can be judged
        return GradientReport(rows=[], method=method, evaluations=setup.runner.evaluations,
                              total=setup.layout.size, notes=setup.notes,
                              problems=setup.problems)
    coords = plan.choose_coordinates(setup.layout, coordinates, seed, analytic)
    used = resolve_method(setup, method, seed)
    h = plan.steps(used, setup.base, setup.layout, step, setup.eps)
    numeric = numeric_derivatives(setup, used, coords, h, refine=step is None)
    comp = compare(setup, numeric, analytic, rtol, atol)
    if method == "auto":
        comp = second_opinion(setup, comp, rtol, atol)
    report = finish(setup, comp, used)
    report.source = Source(setup, analytic, h, used)
    if report.interrupted:
        # Ctrl-C: show what was finished, then let the interrupt go on
        print(report.to_text(), file=sys.stderr)
        raise CheckInterrupted(report)
    return report


def finish(setup: Setup, comp: Comparison, method: str, title="gradient check"):
    """Rows, hints, notes and suggested tolerances: the report of one comparison."""
    rows = rows_of(setup, comp)
    done = comp.numeric.done
    a = comp.analytic[comp.numeric.coords]
    n = comp.numeric.estimates.derivative
    rtol_s, atol_s = verdicts.suggest_tolerances(a[done], n[done], comp.verdict[done])
    hints = verdicts.hints(setup.layout, comp.numeric.coords[done], a[done], n[done],
                           comp.verdict[done], comp.allowed[done])
    notes = list(setup.notes)
    kinked = [r.name for r in rows if r.verdict == "kink"]
    if kinked:
        notes.append(f"{len(kinked)} coordinates sit on a kink, where the cost has two one-sided "
                     f"slopes and the analytic value lies between them: {', '.join(kinked[:5])}"
                     + (" ..." if len(kinked) > 5 else "") + "; a kink does not fail the check")
    noisy = [r.name for r in rows if r.verdict == "noisy"]
    if noisy:
        notes.append(f"{len(noisy)} coordinates could not be decided: the cost's noise "
                     f"(about {setup.line.noise:.2g}) swamps their derivative at every step: "
                     f"{', '.join(noisy[:5])}" + (" ..." if len(noisy) > 5 else ""))
    if any(r.failing for r in rows) and not setup.runner.interrupted:
        note = descent_note(setup, comp.analytic)
        if note:
            hints.append(note)
    return GradientReport(rows=rows, method=method, evaluations=setup.runner.evaluations,
                          total=setup.layout.size, hints=hints, notes=notes,
                          problems=setup.problems, suggested_rtol=rtol_s,
                          suggested_atol=atol_s, interrupted=setup.runner.interrupted,
                          title=title)


def estimate_noise(cost, params):
    """The noise level of the cost's computed values near params (More & Wild, 2011)."""
    setup = prepare(cost, params, repeat=False)
    return NoiseEstimate(level=setup.line.noise,
                         relative=setup.line.noise / abs(setup.f0) if setup.f0 else float("inf"),
                         order=setup.line.order, values=setup.line.values,
                         spacing=setup.line.spacing, evaluations=setup.runner.evaluations)


@dataclass
class NoiseEstimate:
    level: float          # absolute noise of one cost value (a standard deviation)
    relative: float       # level / |f(params)|
    order: int            # difference order the estimate came from (0: no noise seen)
    values: np.ndarray    # the cost values along the line
    spacing: float        # the line's spacing, relative to each coordinate's scale
    evaluations: int


class Source:
    """The cost behind a report, kept so figures can ask for more evaluations later."""

    def __init__(self, setup: Setup, analytic: np.ndarray, h: np.ndarray, method: str):
        self.setup, self.analytic, self.h, self.method = setup, analytic, h, method

    def step_sweep(self, flat_index: int, steps=None) -> dict:
        """Central differences of one coordinate over a wide range of steps (2 per step)."""
        s = float(self.setup.scale[flat_index])
        steps = s * 2.0 ** -np.arange(1, 46) if steps is None else np.asarray(steps)
        where, amounts = [], []
        for h in steps:
            where += [flat_index, flat_index]
            amounts += [float(h), -float(h)]
        run = self.setup.runner.run(where, amounts, label="step sweep")
        v = run.values.real.reshape(-1, 2)
        chosen = self.h if self.method != "complex-step" else stencils.default_steps(
            "central", self.setup.base, self.setup.eps)
        return {"steps": steps, "derivatives": (v[:, 0] - v[:, 1]) / (2 * steps),
                "chosen_step": float(chosen[flat_index]),
                "analytic": float(self.analytic[flat_index])}

    def taylor(self, seed=None):
        from .taylor import taylor_from_setup
        return taylor_from_setup(self.setup, self.analytic, seed)
