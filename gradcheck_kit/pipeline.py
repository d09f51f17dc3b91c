"""The pipeline: params -> tree -> plan -> evaluate -> stencils -> probes -> verdicts -> report.

The public checks (`numeric_gradient`, `compare_gradient`, `estimate_noise`) run
the stages in that order; this module wires them and computes no numerics of
its own beyond choosing what to evaluate next.
"""
from __future__ import annotations

import sys
import warnings
from dataclasses import dataclass, field

import numpy as np

from . import plan, probes, stencils, verdicts
from .analytic import analytic_values
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
# A stencil that meets a non-finite value (a log or sqrt stepped across 0) is redone with
# its step cut by SHORTEN_BY, up to SHORTEN_TIMES times (2^-18 of the step at most), then
# one-sided on the side where the cost is defined.
SHORTEN_BY = 8.0
# Cost values this small next to their variation over a coordinate's scale count as 0.
NEAR_ZERO = 1e-6
SHORTEN_TIMES = 6


@dataclass
class Setup:
    """What every check needs after the cost has run at the base point and its noise lines."""
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
    lines: probes.Lines = None


def prepare(cost, params, *, vectorized=False, executor=None, progress=None,
            repeat=True) -> Setup:
    """Check the inputs, call the cost at the base point (twice) and along the noise lines."""
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
    notes += _non_finite_params_note(base, layout)
    scale = stencils.scale_of(base)
    dtype_eps = float(np.finfo(runner.output_dtype).eps)
    lines = probes.measure_lines(runner, base, scale, f0,
                                 max(dtype_eps, float(np.max(leaf_eps(layout)))))
    line = lines.features
    # Noise counts relative to the size of the cost's values, or of its variation over a
    # coordinate's scale where larger: at a point where the cost is 0 (x |x| at 0), a
    # tiny absolute level would otherwise pass for large relative noise.
    size = float(np.max(np.abs(line.values), initial=abs(f0)))
    if size <= NEAR_ZERO * max(line.curvature_s2, line.slope):
        size = max(line.curvature_s2, line.slope)
    eps_f = probes.relative_precision(runner.output_dtype, line.noise, size)
    noisy = eps_f > NOISY_ABOVE * dtype_eps
    # Steps grow only for costs noisy well beyond rounding (More & Wild, ACM TOMS 38(3),
    # 2012); rounding-level noise enlarged by cancellation only enters the error estimates.
    eps = np.maximum(leaf_eps(layout), eps_f if noisy else dtype_eps)
    notes += precision_notes(runner.output_dtype, layout)
    if lines.undefined:
        notes.append("the cost is not finite (or fails) at some points of the noise probe near "
                     "the base point: the noise level was measured on fewer points")
    if lines.quantized:
        notes.append("the cost's values are piecewise constant along a random line (they repeat "
                      "exactly and jump in between): a rounded, integer-valued or quantized "
                      "output, whose derivative is zero almost everywhere; numeric differences "
                      "only measure its jumps")
    if noisy:
        notes.append(f"the cost is noisy: its values carry noise of about {line.noise:.2g} "
                     f"({eps_f:.2g} relative, measured along three lines after More & Wild); steps "
                     "and error estimates allow for it")
    return Setup(runner, base, layout, f0, eps_f, eps, scale, line, noisy, notes, problems,
                 lines)


def _non_finite_params_note(base, layout) -> list:
    bad = np.flatnonzero(~np.isfinite(base))
    if bad.size == 0:
        return []
    names = [coordinate_name(layout, int(i)) for i in bad]
    return [f"params hold non-finite entries ({verdicts.name_list(names)}): the cost is "
            "finite here, so it does not read them; their rows compare derivatives taken at a "
            "non-finite point"]


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


@dataclass
class Numeric:
    coords: np.ndarray
    h: np.ndarray                # step of each coordinate (the pass its value came from)
    values: np.ndarray           # (coordinates, offsets) cost values of that pass
    estimates: stencils.Estimates
    failed: np.ndarray           # a stencil point raised for this coordinate
    details: list                # text per coordinate ("" when fine)
    done: np.ndarray             # finished before an interrupt
    method: str
    undefined: list = field(default_factory=list)   # coordinates that met non-finite values


def numeric_derivatives(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray,
                        refine: bool = True) -> Numeric:
    """Numeric derivatives at `coords`; non-finite stencil points are redone with shorter
    or one-sided steps, and fourth-order methods refine badly scaled coordinates once."""
    numeric = _one_pass(setup, method, coords, h[coords])
    if setup.runner.interrupted:
        return numeric
    _redo_undefined(setup, numeric)
    if method in stencils.REFINABLE and refine and not setup.runner.interrupted:
        _refine(setup, numeric)
    return numeric


def _refine(setup: Setup, numeric: Numeric) -> None:
    est = numeric.estimates
    terms = term_scale(setup, numeric)
    finite = np.isfinite(numeric.values.real).all(axis=1)
    # The step balance uses the plain rounding bound of the stencil's values, not the
    # margins the error estimate adds (stencils.SUM_ROUNDING and the terms' rounding).
    rounding = stencils.VALUE_ROUNDING[numeric.method] * est.noise / numeric.h
    redo = (est.gap > REFINE_ABOVE * terms) & (est.gap > 64 * rounding) & \
        ~numeric.failed & finite
    if not redo.any():
        return
    idx = np.flatnonzero(redo)
    balance = est.take(idx)
    balance.rounding = rounding[idx]
    h2 = stencils.refined_steps(balance, numeric.h[idx])
    second = _one_pass(setup, numeric.method, numeric.coords[idx], h2)
    ok = ~second.failed & second.done & np.isfinite(second.values.real).all(axis=1)
    plain = second.estimates.take(np.arange(idx.size))
    plain.rounding = stencils.VALUE_ROUNDING[numeric.method] * plain.noise / h2
    use = stencils.pick_refined(balance, plain, terms[idx]) & ok
    first_d = est.derivative[idx].copy()
    est.put(idx[use], second.estimates.take(np.flatnonzero(use)))
    numeric.h[idx[use]] = h2[use]
    numeric.values[idx[use]] = second.values[use]
    # The chosen value's error: the distance between the two values, or its own modelled
    # truncation (plus its rounding, kept), whichever is larger.
    chosen = est.take(idx)
    modelled = stencils.extrapolation_error(chosen, terms[idx]) - chosen.rounding
    distance = np.abs(first_d - second.estimates.derivative)
    est.truncation[idx[ok]] = np.maximum(distance, modelled)[ok]


def _redo_undefined(setup: Setup, numeric: Numeric) -> None:
    """Coordinates whose stencil met a non-finite value: shorter steps, then one side.

    Only these coordinates are redone; the others keep their values untouched.
    """
    if numeric.method == "complex-step":
        return
    bad = np.flatnonzero(~np.isfinite(numeric.values).all(axis=1) & ~numeric.failed &
                         numeric.done)
    if bad.size == 0:
        return
    first_values = numeric.values[bad].copy()
    h = numeric.h[bad].copy()
    todo = np.ones(bad.size, dtype=bool)
    for _ in range(SHORTEN_TIMES):
        if not todo.any() or setup.runner.interrupted:
            break
        h[todo] /= SHORTEN_BY
        k = np.flatnonzero(todo)
        again = _one_pass(setup, numeric.method, numeric.coords[bad[k]], h[k])
        fine = np.isfinite(again.values).all(axis=1) & ~again.failed & again.done
        _adopt(numeric, bad[k[fine]], again, np.flatnonzero(fine))
        # The first finite step may still reach close to where the cost is undefined (its
        # derivatives grow fast there): one step shorter again is used, trusted to within
        # the distance between the two values scaled by the stencil's order.
        k_fine = k[fine]
        if k_fine.size:
            inner = _one_pass(setup, numeric.method, numeric.coords[bad[k_fine]],
                              h[k_fine] / SHORTEN_BY)
            ok = np.isfinite(inner.values).all(axis=1) & ~inner.failed & inner.done
            shrink = SHORTEN_BY ** stencils.ORDER[numeric.method] - 1
            distance = np.abs(inner.estimates.derivative -
                              numeric.estimates.derivative[bad[k_fine]])
            inner.estimates.truncation = np.maximum(inner.estimates.truncation,
                                                    2 * distance / shrink)
            _adopt(numeric, bad[k_fine[ok]], inner, np.flatnonzero(ok))
            h[k_fine[ok]] /= SHORTEN_BY
        for j, i in zip(bad[k[fine]], k[fine]):
            numeric.details[j] = (f"the cost is not finite at {_offsets_text(numeric, first_values[i], j)}"
                                  f": step shortened to {h[i]:.3g}")
        todo[k[fine]] = False
    rest = bad[todo]
    if rest.size and not setup.runner.interrupted:
        _one_sided(setup, numeric, rest, first_values[todo])
    numeric.undefined = [int(numeric.coords[j]) for j in bad]


def _offsets_text(numeric: Numeric, values, j) -> str:
    offsets = np.array(stencils.OFFSETS[numeric.method]) * numeric.h[j]
    where = [f"{o:+.3g}" for o, v in zip(offsets, values) if not np.isfinite(v)]
    return "x" + ", x".join(where)


def _adopt(numeric: Numeric, positions, other: Numeric, from_positions) -> None:
    """Take `other`'s results at from_positions into numeric at positions."""
    if len(positions) == 0:
        return
    numeric.estimates.put(positions, other.estimates.take(from_positions))
    numeric.h[positions] = other.h[from_positions]
    numeric.values[positions] = other.values[from_positions]


def _one_sided(setup: Setup, numeric: Numeric, positions, first_values) -> None:
    """One-sided differences at steps h and h/2 on the side where the cost was finite,
    extrapolated: 2 D(h/2) - D(h), trusted to |D(h/2) - D(h)| plus rounding."""
    offsets = np.array(stencils.OFFSETS[numeric.method])
    h = numeric.h[positions]
    sides = []
    for values in first_values:
        finite_plus = np.isfinite(values[offsets > 0]).all()
        finite_minus = np.isfinite(values[offsets < 0]).all()
        sides.append(1.0 if finite_plus or not finite_minus else -1.0)
    sides = np.array(sides)
    coords = numeric.coords[positions]
    where = np.repeat(coords, 2).tolist()
    amounts = (np.stack([sides * h, sides * h / 2], axis=1)).ravel().tolist()
    run = setup.runner.run(where, amounts, label="one-sided differences")
    v = run.values.real.reshape(-1, 2)
    far = sides * (v[:, 0] - setup.f0) / h
    near = sides * (v[:, 1] - setup.f0) / (h / 2)
    d = 2 * near - far
    noise = np.maximum(setup.eps_f * np.max(np.abs(v), axis=1, initial=abs(setup.f0)),
                       setup.line.noise)
    for k, j in enumerate(positions):
        side = "forward" if sides[k] > 0 else "backward"
        ok = np.isfinite(v[k]).all() and not any(2 * k + r in run.failures for r in (0, 1))
        est = numeric.estimates
        if ok:
            est.derivative[j], est.truncation[j] = d[k], abs(near[k] - far[k])
            est.rounding[j], est.gap[j], est.curvature[j] = 10 * noise[k] / h[k], 0.0, 0.0
            numeric.details[j] = (f"the cost is not finite at "
                                  f"{_offsets_text(numeric, first_values[k], j)}: {side} "
                                  "differences used")
        else:
            est.derivative[j] = np.nan
            numeric.details[j] = (f"the cost is not finite near here (at "
                                  f"{_offsets_text(numeric, first_values[k], j)}, and on both "
                                  "sides at every shorter step tried)")


def _one_pass(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray) -> Numeric:
    """One stencil per coordinate; h is aligned with coords."""
    full = np.zeros(setup.base.size)
    full[coords] = h
    where, amounts = plan.requests(method, coords, full)
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
    with np.errstate(all="ignore"):
        est = stencils.combine(method, values, setup.f0, h, setup.eps_f, s, setup.line.noise,
                               setup.line.curvature_s2 / s ** 2, 8 * setup.line.third / s ** 3)
    return Numeric(coords, np.array(h, dtype=float), values, est, failed, details, done, method)


def term_scale(setup: Setup, numeric: Numeric) -> np.ndarray:
    """Per coordinate, the size of the terms a gradient entry is summed from (see verdicts)."""
    est = numeric.estimates
    s = setup.scale[numeric.coords]
    seen = np.maximum(est.curvature * s + setup.line.curvature_s2 / s, setup.line.slope / s)
    return verdicts.term_scale(est.derivative, setup.f0, s, seen)


def resolve_method(setup: Setup, method: str, seed, complex_safe=None) -> str:
    """'auto': the complex step where a probe shows the cost is complex-safe, else Richardson.

    A noisy cost gets Richardson with noise-sized steps: the complex step would
    differentiate the noise itself.  A requested complex step is probed too: where
    the cost is not complex-safe it falls back to Richardson, with a warning, unless
    complex_safe=True (the caller vouches for the cost).  complex_safe=False rules the
    complex step out for 'auto'.
    """
    if method not in ("auto", "complex-step"):
        return method
    if complex_safe is True:
        return "complex-step"
    if method == "auto" and complex_safe is False:
        setup.notes.append("method auto chose richardson: complex_safe=False")
        return "richardson"
    if method == "auto" and setup.noisy:
        setup.notes.append("method auto chose richardson: the cost is noisy")
        return "richardson"
    safe, reason = probes.complex_safety(setup.runner, setup.base, setup.scale, setup.f0,
                                         setup.eps_f, setup.eps, setup.line.noise, seed)
    if safe:
        return "complex-step"
    if method == "auto":
        setup.notes.append(f"method auto chose richardson: {reason}")
    else:
        message = (f"method complex-step was asked for, but {reason}; richardson was used "
                   "instead (pass complex_safe=True to insist on the complex step)")
        warnings.warn(message, RuntimeWarning, stacklevel=3)
        setup.notes.append(message)
    return "richardson"


def numeric_gradient(cost, params, *, method="central", step=None, vectorized=False,
                     executor=None, complex_safe=None):
    """Numerical gradient of a scalar cost, in the structure (and float dtypes) of params."""
    plan.check_method(method)
    plan.check_flags(vectorized=vectorized, complex_safe=complex_safe)
    setup = prepare(cost, params, vectorized=vectorized, executor=executor, repeat=False)
    method = resolve_method(setup, method, None, complex_safe)
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


def compare(setup: Setup, numeric: Numeric, analytic: np.ndarray, rtol, atol,
            analytic_eps=None) -> Comparison:
    """Verdicts for one set of numeric derivatives.  analytic_eps: the precision of the
    analytic values (float64's epsilon when None)."""
    a = analytic[numeric.coords]
    est = numeric.estimates
    terms = term_scale(setup, numeric)
    with np.errstate(all="ignore"):
        allowed = verdicts.allowed_difference(a, est.derivative, est.error, terms=terms,
                                              eps_f=setup.eps_f, rtol=rtol, atol=atol,
                                              eps_a=analytic_eps)
        verdict = verdicts.decide(a, est.derivative, allowed, numeric.failed)
        kinks = stencils.find_kinks(numeric.method, numeric.values, setup.f0, numeric.h,
                                    est.noise)
    details = list(numeric.details)
    verdict = verdicts.apply_kinks(verdict, a, kinks, allowed, details)
    if rtol is None and atol is None:
        # A quantized cost's jumps inflate the term scale: no value is negligible there.
        quantized = setup.lines is not None and setup.lines.quantized
        verdict = verdicts.mark_undecided(verdict, a, est, 0 * terms if quantized else terms,
                                          details, setup.noisy,
                                          setup.line.noise)
    return Comparison(numeric, analytic, allowed, verdict, kinks, details)


def second_opinion(setup: Setup, first: Comparison, rtol, atol,
                   analytic_eps=None) -> Comparison:
    """Recheck mismatches with real Richardson differences (four evaluations each).

    Central, one-sided and complex-step stencils cannot tell a kink from a wrong
    value (the complex step never leaves the point), and a one-sided or central
    difference may carry more step error than its model allows where the cost
    curves fast; the complex step is wrong where a cost is complex-safe in general
    but not in one coordinate.  So every such method's mismatches are rechecked:
    where Richardson agrees, or finds a kink with the analytic value between the
    one-sided slopes, that verdict (and its numbers) settles the row: a false
    alarm costs a user more than four evaluations.
    """
    method = first.numeric.method
    failing = ("disagree", "non-finite") if method == "complex-step" else ("disagree",)
    bad = np.flatnonzero(np.isin(first.verdict, failing))
    if method in stencils.REFINABLE or bad.size == 0 or setup.runner.interrupted:
        return first
    coords = first.numeric.coords[bad]
    h = plan.steps("richardson", setup.base, setup.layout, None, setup.eps)
    again = compare(setup, numeric_derivatives(setup, "richardson", coords, h),
                    first.analytic, rtol, atol, analytic_eps)
    settled = np.isin(again.verdict, ("agree", "kink"))
    if not settled.any():
        return first
    num = first.numeric
    num.estimates.put(bad[settled], again.numeric.estimates.take(np.flatnonzero(settled)))
    first.verdict[bad[settled]] = again.verdict[settled]
    first.allowed[bad[settled]] = again.allowed[settled]
    for j, k in zip(bad[settled], np.flatnonzero(settled)):
        first.details[j] = again.details[k] or "decided by real differences"
    agreed = [coordinate_name(setup.layout, int(c))
              for c, v in zip(coords[settled], again.verdict[settled]) if v == "agree"]
    if agreed:
        setup.notes.append(f"{len(agreed)} coordinates where the {method} differences "
                           f"disagreed were "
                           f"rechecked with real differences and pass: "
                           f"{verdicts.name_list(agreed)}")
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
        rows.append(Row(entry_name(leaf, index), leaf.name, index, int(flat), float(a[j]),
                        float(n[j]), float(abs(a[j] - n[j])), float(rel[j]), float(err[j]),
                        str(comp.verdict[j]), comp.details[j]))
    return rows


def compare_gradient(cost, params, gradient=None, *, method="auto", step=None, rtol=None,
                     atol=None, coordinates=None, seed=None, executor=None, vectorized=False,
                     progress=None, complex_safe=None,
                     allow_undecided=False) -> GradientReport:
    """Compare the analytic gradient with numeric derivatives, coordinate by coordinate."""
    plan.check_method(method)
    plan.check_flags(seed=seed, progress=progress, vectorized=vectorized,
                     complex_safe=complex_safe, allow_undecided=allow_undecided)
    rtol = plan.check_tolerance(rtol, "rtol")
    atol = plan.check_tolerance(atol, "atol")
    setup = prepare(cost, params, vectorized=vectorized, executor=executor, progress=progress)
    analytic, analytic_eps = analytic_values(cost, setup.base, setup.layout, gradient,
                                             vectorized)
    if setup.problems:  # a random cost: no coordinate can be judged
        return GradientReport(rows=[], method=method, evaluations=setup.runner.evaluations,
                              total=setup.layout.size, notes=setup.notes,
                              problems=setup.problems)
    if probes.flat_but_sloped(setup.lines, analytic, setup.f0):
        setup.notes.append("the cost does not change along a random line through the point "
                           "although the analytic gradient says it should: it is piecewise "
                           "constant (rounded or quantized) here, or the gradient is wrong")
    coords = plan.choose_coordinates(setup.layout, coordinates, seed, analytic)
    used = resolve_method(setup, method, seed, complex_safe)
    h = plan.steps(used, setup.base, setup.layout, step, setup.eps)
    numeric = numeric_derivatives(setup, used, coords, h, refine=step is None)
    comp = compare(setup, numeric, analytic, rtol, atol, analytic_eps)
    comp = second_opinion(setup, comp, rtol, atol, analytic_eps)
    report = finish(setup, comp, used, analytic_eps=analytic_eps,
                    allow_undecided=allow_undecided)
    report.source = Source(setup, analytic, h, used)
    if report.interrupted:
        # Ctrl-C: show what was finished, then let the interrupt go on
        print(report.to_text(), file=sys.stderr)
        raise CheckInterrupted(report)
    return report


def finish(setup: Setup, comp: Comparison, method: str, title="gradient check",
           analytic_eps=None, allow_undecided=False):
    """Rows, hints, notes and suggested tolerances: the report of one comparison."""
    rows = rows_of(setup, comp)
    done = comp.numeric.done
    a = comp.analytic[comp.numeric.coords]
    n = comp.numeric.estimates.derivative
    rtol_s, atol_s = verdicts.suggest_tolerances(a[done], n[done], comp.verdict[done])
    hints = verdicts.hints(setup.layout, comp.numeric.coords[done], a[done], n[done],
                           comp.verdict[done], comp.allowed[done])
    notes = list(setup.notes)
    problems = list(setup.problems)
    if analytic_eps is not None and analytic_eps > np.finfo(np.float64).eps:
        notes.append(f"the analytic gradient holds values of lower precision (eps "
                     f"{analytic_eps:.3g}): the allowance includes their rounding, so agreement "
                     "means less than in float64")
    if comp.numeric.undefined:
        names = [coordinate_name(setup.layout, c) for c in comp.numeric.undefined]
        notes.append(f"the cost is not finite at some stencil points of "
                     f"{verdicts.count(len(names), 'coordinate')} ({verdicts.name_list(names)}): those were redone with shorter "
                     "steps or one-sided differences (see their rows); the others are unaffected")
    kinked = [r.name for r in rows if r.verdict == "kink"]
    if kinked:
        notes.append(f"{verdicts.count(len(kinked), 'coordinate')} on a kink, where the cost has two one-sided "
                     f"slopes and the analytic value lies between them: "
                     f"{verdicts.name_list(kinked)}; a kink does not fail the check")
    undecided = [r.name for r in rows if r.verdict == "noisy"]
    if undecided:
        notes.append(f"{verdicts.count(len(undecided), 'coordinate')} could not be decided: the numeric "
                     f"derivative's error estimate is as large as the values (cost noise about "
                     f"{setup.line.noise:.2g}): {verdicts.name_list(undecided)}")
    if rows and len(undecided) == len(rows) and not allow_undecided:
        problems.append(f"no coordinate could be decided: all {len(rows)} are undecided "
                        "(noisy), so nothing was checked; make the cost deterministic and "
                        "smooth at this point, or pass allow_undecided=True to accept this")
    if any(r.failing for r in rows) and not setup.runner.interrupted:
        if probes.descent_uphill(setup.runner, comp.analytic, setup.scale, setup.f0,
                                 setup.line.noise, setup.eps_f):
            hints.append("descent: a small step against the analytic gradient raises the cost "
                         "and a step along it lowers it: it points uphill, so gradient descent "
                         "would climb")
    return GradientReport(rows=rows, method=method, evaluations=setup.runner.evaluations,
                          total=setup.layout.size, hints=hints, notes=notes,
                          problems=problems, suggested_rtol=rtol_s,
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
    values: np.ndarray    # the cost values along the first line
    spacing: float        # the first line's spacing, relative to each coordinate's scale
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

    def remainder(self, seed=None):
        from .remainder import remainder_from_setup
        return remainder_from_setup(self.setup, self.analytic, seed)
