"""The pipeline: params -> tree -> plan -> evaluate -> stencils -> probes -> numeric ->
verdicts -> hints / notes -> report.

The public checks (`numeric_gradient`, `compare_gradient`, `estimate_noise`) run the
stages in that order; this module wires them (and holds the entries' option handling):
numerics live in the stages, sentences in notes.py.
"""
from __future__ import annotations

import inspect
import os
import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from . import notes as say
from . import plan, probes, stencils, verdicts
from .analytic import analytic_values
from .errors import CheckInputError, LongCheckWarning, interrupts_as_check_interrupted
from .evaluate import CostRunner, SeededCall, draw_seed
from .frameworks import takes_framework_values
from .hints import central_error, central_tolerances, uphill_hint
from .hints import hints as mismatch_hints
from .numeric import (Numeric, long_for_length, measured_extrapolation, numeric_derivatives,
                      SIDE_RUNGS, SIDE_SHRINK, side_ladder, side_rung, term_sizes,
                      walk_down)
from .probes import Setup
from .reevaluate import Reevaluation, remainder_along
from .report import GradientReport, RowColumns, outside_note
from .tree import coordinate_name, flatten, leaf_eps, rebuild


def prepare(cost, params, *, vectorized=False, executor=None, progress=None,
            repeat=True) -> Setup:
    """Check the inputs, call the cost at the base point (twice) and along the noise lines."""
    plan.check_callable(cost, "cost")
    base, layout = flatten(params)
    runner = CostRunner(cost, layout, base, vectorized=vectorized, executor=executor,
                        progress=progress)
    f0, after = runner.at_base()
    notes, problems = [], []
    changed = runner.changed_leaves(after)
    if changed:
        notes.append(say.edits_input(changed))
    if repeat:
        again, _ = runner.at_base("at the base point, called a second time")
        if probes.repeat_differs(f0, again):
            problems.append(say.not_deterministic(f0, again))
    bad = np.flatnonzero(~np.isfinite(base))
    if bad.size:
        notes.append(say.non_finite_params([coordinate_name(layout, int(i)) for i in bad]))
    scale = stencils.scale_of(base)
    dtype_eps = float(np.finfo(runner.output_dtype).eps)
    values_eps = max(dtype_eps, float(np.max(leaf_eps(layout))))
    lines = probes.measure_lines(runner, base, scale, f0, values_eps,
                                 probes.leaf_largest(base, layout))
    if lines.flat and not lines.quantized:
        lines = probes.look_coarser(runner, lines, f0, values_eps)
    eps_f, noisy, eps = probes.precision(lines, f0, runner.output_dtype, leaf_eps(layout))
    notes += say.lower_precision(runner.output_dtype,
                                 [leaf.name for leaf in layout.leaves if leaf.dtype != np.float64])
    if lines.undefined:
        notes.append(say.undefined_on_lines())
    if lines.quantized:
        notes.append(say.quantized())
    if noisy:
        notes.append(say.noisy(lines.features.noise, eps_f))
    return Setup(runner, base, layout, f0, eps_f, eps, scale, lines.features, noisy, notes,
                 problems, lines)


def resolve_method(setup: Setup, method: str, seed, complex_safe=None) -> tuple:
    """The method to use, and the notes that say why: (method, notes).

    'auto': the complex step where a probe shows the cost is complex-safe, else
    Richardson.  A noisy cost gets Richardson with noise-sized steps: the complex step
    would differentiate the noise itself.  A requested complex step is probed too:
    where the cost is not complex-safe it falls back to Richardson, with a warning,
    unless complex_safe=True (the caller vouches for the cost).  complex_safe=False
    rules the complex step out for 'auto'.
    """
    if method not in ("auto", "complex-step"):
        return method, []
    if complex_safe is True:
        return "complex-step", []
    if method == "auto" and complex_safe is False:
        return "richardson", ["method auto chose richardson: complex_safe=False"]
    if method == "auto" and setup.noisy:
        return "richardson", ["method auto chose richardson: the cost is noisy"]
    safe, reason = probes.complex_safety(setup.runner, setup.base, setup.scale, setup.f0,
                                         setup.eps_f, setup.eps, setup.line.noise, seed)
    if safe:
        return "complex-step", []
    if method == "auto":
        return "richardson", [f"method auto chose richardson: {reason}"]
    message = (f"method complex-step was asked for, but {reason}; richardson was used "
               "instead (pass complex_safe=True to insist on the complex step)")
    warnings.warn(message, RuntimeWarning, stacklevel=5)   # past both entry decorators
    return "richardson", [message]


@interrupts_as_check_interrupted("numeric gradient")
@takes_framework_values
def numeric_gradient(cost, params, *, method="central", step=None, vectorized=False,
                     executor=None, complex_safe=None):
    """Numerical gradient of a scalar cost, in the structure (and float dtypes) of params.

    Parameters
    ----------
    cost : callable
        ``cost(params) -> float`` (a 0-d array or a one-element result is taken too).
    params : array_like, float, or dict / list / tuple nest of those
        The point; float leaves of any shape and dtype; torch tensors, modules and JAX
        arrays with the optional extras.  Never modified.
    method : {"central", "forward", "backward", "five-point", "richardson", "complex-step", "auto"}
        The stencil.  "auto": the complex step where a probe finds the cost complex-safe,
        else Richardson.
    step : float or a nest like params, optional
        Steps, absolute; automatic (and refined for fourth-order stencils) when None.
    vectorized : bool
        The cost takes a batch (one extra leading axis on every leaf) and returns one
        value per row.
    executor : concurrent.futures.Executor, optional
        Spread the calls over it (a process pool, a Dask client's executor).
    complex_safe : bool, optional
        True: use the complex step without probing; False: never.

    Returns
    -------
    Same structure as params
        The derivative of each entry, float64 (float32 leaves stay float32).

    Raises
    ------
    CheckInputError, CheckTypeError
        Bad params or options, or a cost that fails or is not finite at params.
    CheckInterrupted
        Ctrl-C (no partial gradient is returned).

    Examples
    --------
    >>> import numpy as np
    >>> g = numeric_gradient(lambda x: np.sum(x ** 3), np.array([1.0, 2.0]))
    >>> bool(np.allclose(g, [3.0, 12.0]))
    True
    """
    plan.check_options(method=method, step=step, vectorized=vectorized, executor=executor,
                       complex_safe=complex_safe)
    setup = prepare(cost, params, vectorized=vectorized, executor=executor, repeat=False)
    method, _ = resolve_method(setup, method, None, complex_safe)
    coords = np.arange(setup.layout.size)
    h = plan.steps(method, setup.base, setup.layout, step, setup.eps)
    numeric = numeric_derivatives(setup, method, coords, h, refine=step is None)
    if setup.runner.interrupted:    # Ctrl-C or a failed executor: no half-made gradient
        raise setup.runner.stop_error(None, "numeric gradient")
    if numeric.failed.any():
        bad = [numeric.details[j] for j in np.flatnonzero(numeric.failed)[:3]]
        warnings.warn(f"numeric_gradient: {int(numeric.failed.sum())} coordinates are NaN because "
                      f"the cost failed near them, e.g. {bad[0]}", RuntimeWarning,
                      stacklevel=3)   # the caller, past the interrupt decorator
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
    notes: list = field(default_factory=list)   # what a later stage found out about these rows
    # The tool's own allowance (as `allowed` when no rtol / atol was given), which the
    # hints test their patterns against, never the caller's tolerances.
    own_allowed: np.ndarray = None
    # Rows left undecided because a kink lies on both sides within every step tried
    # (one_sided_recheck): their own note says so, not the noise note.
    unresolved: tuple = ()


def compare(setup: Setup, numeric: Numeric, analytic: np.ndarray, rtol, atol,
            analytic_eps=None) -> Comparison:
    """Verdicts for one set of numeric derivatives.  analytic_eps: the precision of the
    analytic values (float64's epsilon when None)."""
    a = analytic[numeric.coords]
    est = numeric.estimates
    terms = term_sizes(setup, numeric)
    eps_dtype = float(np.finfo(setup.runner.output_dtype).eps)
    cost_terms = abs(setup.f0) / setup.scale[numeric.coords]
    with np.errstate(all="ignore"):
        allowed = verdicts.allowed_difference(a, est.derivative, est.error, terms=terms,
                                              eps_f=setup.eps_f, rtol=rtol, atol=atol,
                                              eps_dtype=eps_dtype, eps_a=analytic_eps,
                                              cost_terms=cost_terms)
        verdict = verdicts.decide(a, est.derivative, allowed, numeric.failed)
        kinks = stencils.find_kinks(numeric.method, numeric.values, setup.f0, numeric.h,
                                    est.noise)
    details = list(numeric.details)
    # Between the slopes: within their own slack (their step error and rounding) and the
    # analytic values' rounding; the central value's error estimate says nothing about
    # the one-sided slopes (in float32 it doubled the margin and let a sign error pass).
    if kinks.found.any():   # rare: the margin is only worth computing for kink rows
        margin = allowed
        if rtol is None and atol is None:
            with np.errstate(all="ignore"):
                margin = verdicts.allowed_difference(a, est.derivative, 0 * est.error,
                                                     terms=terms, eps_f=setup.eps_f,
                                                     eps_a=analytic_eps, eps_dtype=eps_dtype,
                                                     cost_terms=cost_terms)
        verdict = verdicts.apply_kinks(verdict, a, kinks, margin, details)
    if setup.lines is not None and setup.lines.quantized:
        # A piecewise-constant cost flat over a whole stencil says nothing about the
        # derivative: a zero there is not evidence for a zero gradient.
        verdict = verdicts.mark_flat(verdict, numeric.values, setup.f0, details)
    if rtol is None and atol is None:
        # A quantized cost's jumps inflate the term scale: no value is negligible there.
        quantized = setup.lines is not None and setup.lines.quantized
        sizes = 0 * terms if quantized else term_sizes(setup, numeric, third=True)
        verdict = verdicts.mark_undecided(verdict, a, est, sizes,
                                          details, setup.noisy,
                                          setup.line.noise)
    own = allowed
    if rtol is not None or atol is not None:
        with np.errstate(all="ignore"):
            own = verdicts.allowed_difference(a, est.derivative, est.error, terms=terms,
                                              eps_f=setup.eps_f, eps_a=analytic_eps,
                                              eps_dtype=eps_dtype, cost_terms=cost_terms)
    return Comparison(numeric, analytic, allowed, verdict, kinks, details, own_allowed=own)


def second_opinion(setup: Setup, first: Comparison, rtol, atol,
                   analytic_eps=None) -> Comparison:
    """Recheck mismatches, and rough agreements, with real Richardson differences (four
    evaluations each).

    Central, one-sided and complex-step stencils cannot tell a kink from a wrong
    value (the complex step never leaves the point), and a one-sided or central
    difference may carry more step error than its model allows where the cost
    curves fast; the complex step is wrong where a cost is complex-safe in general
    but not in one coordinate.  So every such method's mismatches are rechecked:
    where Richardson agrees, or finds a kink with the analytic value between the
    one-sided slopes, that verdict (and its numbers) settles the row: a false
    alarm costs a user more than four evaluations.  An agreement whose step error
    alone is a large share of the value (a kink inside a central stencil) proves
    little, so Richardson's verdict replaces it, whatever it is.
    """
    method = first.numeric.method
    failing = ("disagree", "non-finite") if method == "complex-step" else ("disagree",)
    if not setup.noisy:
        # Undecided rows of a noise-free cost were too far apart for the first method's
        # error estimate (a one-sided step at a minimiser): a finer method may decide them.
        failing += ("noisy",)
    rough = verdicts.rough_agreement(first.verdict, first.numeric.estimates)
    bad = np.flatnonzero(np.isin(first.verdict, failing) | rough)
    if method in stencils.REFINABLE or bad.size == 0 or setup.runner.interrupted:
        return first
    coords = first.numeric.coords[bad]
    h = plan.steps("richardson", setup.base, setup.layout, None, setup.eps)
    again = compare(setup, numeric_derivatives(setup, "richardson", coords, h),
                    first.analytic, rtol, atol, analytic_eps)
    # A mismatch stands unless Richardson settles it: it agrees (or finds a kink), and
    # either its allowance is no looser than the first method's, or it shows the first
    # value off by more than that value's own error estimate.  A looser recheck that
    # agrees only because it knows less must not overrule a precise disagreement (a
    # complex step's, on a coordinate whose cost varies on a length of 1e-3).  A rough
    # agreement is Richardson's to decide either way (its error is far smaller, and it
    # can tell a kink).
    first_est, again_est = first.numeric.estimates.take(bad), again.numeric.estimates
    shown_off = np.abs(first_est.derivative - again_est.derivative) > \
        verdicts.SAFETY * first_est.error + again_est.error
    no_looser = again.allowed <= first.allowed[bad]
    settled = (np.isin(again.verdict, ("agree", "kink")) & (shown_off | no_looser)) | rough[bad]
    if not settled.any():
        return first
    taken = _take_rows(first, [(bad[settled], again, np.flatnonzero(settled))],
                       lambda _k: "decided by Richardson extrapolation")
    agreed = [coordinate_name(setup.layout, int(c))
              for c, v in zip(coords[settled], again.verdict[settled]) if v == "agree"]
    notes = list(first.notes)
    if agreed:
        notes.append(say.rechecked(agreed, method))
    return replace(taken, notes=notes)


def _take_rows(first: Comparison, parts, detail) -> Comparison:
    """first, with rows replaced by rechecks' rows: parts holds (rows, again, at), again's
    rows at positions `at` replacing first's `rows`: numeric values and steps, verdicts,
    allowances, and details (detail(k) where again's row has none).  One copy of first
    for all parts."""
    numeric = first.numeric.copy()
    verdict, allowed, details = first.verdict.copy(), first.allowed.copy(), list(first.details)
    own = first.own_allowed.copy()
    for rows, again, at in parts:
        numeric.estimates.put(rows, again.numeric.estimates.take(at))
        numeric.h[rows] = again.numeric.h[at]
        verdict[rows], allowed[rows] = again.verdict[at], again.allowed[at]
        own[rows] = again.own_allowed[at]
        for j, k in zip(rows, at):
            details[j] = again.details[k] or detail(k)
    return replace(first, numeric=numeric, verdict=verdict, allowed=allowed, details=details,
                   own_allowed=own)


# An agreement whose error estimate is above this share of the value is loose: a 0.1%
# error in the analytic value would pass it.
LOOSE = 1e-4


# A disagreement by at most MARGINAL times its allowance is marginal (shorter_steps): a
# shortened value that agrees settles it, if its error is at most MARGINAL_LOOSER times
# the first one's.
MARGINAL = 4.0
MARGINAL_LOOSER = 2.0


def shorter_steps(setup: Setup, first: Comparison, rtol, atol,
                  analytic_eps=None) -> Comparison:
    """Recheck with Richardson at ever shorter steps the rows that disagree (or, for a
    noise-free cost, are undecided) with an automatic step long for the length the cost
    varies on there (numeric.long_for_length),
    and the rows that agree only loosely (an error estimate above LOOSE of the value,
    where a 0.1% error would pass: a central difference next to a pole).  Where the values
    settle, with a smaller error, they and their verdict replace the row's.  Only these
    rows pay: a false alarm or a missed error costs a user more than the evaluations."""
    est = first.numeric.estimates
    # Loose from step error (shorter steps help), not from noise or rounding (they do not);
    # a value smaller than its error (a zero gradient at a minimiser) is no loose value.
    # One-sided differences are loose by design (their users chose one evaluation each).
    size = np.abs(est.derivative)
    loose = (first.verdict == "agree") & (est.error > LOOSE * size) & (est.error < size) & \
        (est.truncation > est.rounding) & (first.numeric.method not in ("forward", "backward"))
    # Undecided rows of a noise-free cost too: a step far too long for the length leaves
    # the value unknown rather than wrong (a coordinate of size 1e-6 whose step is sized
    # from 1).
    unsure = ("disagree",) if setup.noisy else ("disagree", "noisy")
    # ... and the rows that disagree through a step error whose model is unconfirmed, up
    # to MEASURED_ROWS of them, those nearest their allowance first: a stencil across a
    # bend shorter than the step (a smoothed float32 pinball loss) carries an error that
    # does not shrink like h^2, and its gap to the lower-order value understated it
    # 2.5-fold; a central step of 4 on float32 logits near 1000 understated it 15-fold.
    a = first.analytic[first.numeric.coords]
    with np.errstate(all="ignore"):
        over = np.abs(a - est.derivative) / first.allowed
        # A central or one-sided value's step error is a model from the lines' curvature,
        # never measured; a fourth-order one's is its gap, in doubt where it dominates (a
        # complex step's, at a step of 1e-20, is none).
        modelled = first.numeric.method in ("central", "forward", "backward")
        unconfirmed = (first.verdict == "disagree") & \
            (modelled | (est.truncation > est.rounding)) & np.isfinite(over)
    check = np.flatnonzero(unconfirmed)
    check = check[np.argsort(over[check], kind="stable")][:MEASURED_ROWS]
    marginal = np.zeros(len(over), dtype=bool)
    marginal[check] = over[check] <= MARGINAL
    taken = np.zeros(len(over), dtype=bool)
    taken[check] = True
    bad = np.flatnonzero((np.isin(first.verdict, unsure) & long_for_length(first.numeric)) |
                         loose | taken)
    if bad.size == 0 or setup.runner.interrupted:
        return first
    shorter, converged = walk_down(setup, first.numeric, bad)
    again = compare(setup, shorter, first.analytic, rtol, atol, analytic_eps)
    # A converged value replaces the first where its error is smaller; where it shows the
    # first one off by more than that one's error estimate, whatever its own (the first
    # estimate is refuted); and where a marginal disagreement's shortened value agrees:
    # the first step's error, not the gradient, is in doubt (in float32 the shorter
    # step's rounding may make its error no smaller, but a recheck that knows much less
    # cannot overrule).
    shown_off = np.abs(shorter.estimates.derivative - est.derivative[bad]) > \
        verdicts.SAFETY * est.error[bad] + shorter.estimates.error
    settled = converged & ((shorter.estimates.error < est.error[bad]) | shown_off |
                           (marginal[bad] & (again.verdict == "agree") &
                            (shorter.estimates.error <= MARGINAL_LOOSER * est.error[bad])))
    if not settled.any():
        return first
    return _take_rows(first, [(bad[settled], again, np.flatnonzero(settled))],
                      lambda k: f"step shortened to {shorter.h[k]:.3g}: the cost varies on "
                                "a shorter length here")


# Rows whose values are half or more apart (or whose allowance is VAGUE_SHARE of the value
# or more) yet do not disagree, and are not negligible next to their
# own terms, are measured along their own line, up to this many per check
# (12 evaluations each: a line and a Richardson pass).
OWN_LINE_ROWS = 8
# 2%: a float32 fit with an intercept of 850 gave another entry an estimate of 2% of its
# value (from the intercept's rounding), and a 5% error in it passed.
VAGUE_SHARE = 0.02


def own_lines(setup: Setup, first: Comparison, rtol, atol, analytic_eps=None) -> Comparison:
    """Recheck, with the noise and curvature seen along the coordinate alone
    (probes.coordinate_line), the rows that agree or are undecided although analytic and
    numeric values are half or more apart, or whose allowance reaches VAGUE_SHARE of
    the value.  Their error estimate and allowance came
    from lines through all coordinates, which carry every coordinate's noise and
    curvature: one entry of 1e4 in a float32 cost would hide a sign error in another of
    size 1.  A row whose own line decides it (agree, disagree or kink) takes that
    verdict and its numbers."""
    # A noisy cost's noise is everywhere, and one short line measures it less surely than
    # three: only rounding can be coordinate-local.
    if rtol is not None or atol is not None or setup.noisy or setup.lines is None or \
            setup.lines.quantized:
        return first
    est = first.numeric.estimates
    a = first.analytic[first.numeric.coords]
    s = setup.scale[first.numeric.coords]
    size = np.maximum(np.abs(a), np.abs(est.derivative))
    with np.errstate(all="ignore"):
        own = np.abs(setup.f0) / s + est.curvature * stencils.reach(
            est.derivative, est.curvature, s, np.abs(setup.base[first.numeric.coords]))
        apart = verdicts.relative_error(a, est.derivative) >= verdicts.UNDECIDED_SHARE
        # ... or allowed to be VAGUE_SHARE of the value off or more (from its error
        # estimate or the terms' rounding): an error of a few percent passes such a row.
        vague = first.allowed >= VAGUE_SHARE * size
        share = size / own
    # Kinks too: a smooth bend shorter than the step looks like one, and the lines' noise
    # (that bend, read as noise elsewhere) keeps the step from shrinking to resolve it.
    candidates = ((np.isin(first.verdict, ("agree", "noisy")) & (apart | vague)) |
                  (first.verdict == "kink")) & np.isfinite(size) & \
        (size > verdicts.NEGLIGIBLE * own)
    rows = np.flatnonzero(candidates)
    rows = rows[np.argsort(-share[rows], kind="stable")][:OWN_LINE_ROWS]
    if rows.size == 0:
        return first
    h = plan.steps("richardson", setup.base, setup.layout, None, setup.eps)
    decided = []
    for j in rows:
        if setup.runner.interrupted:
            break
        c = first.numeric.coords[j]
        seen = probes.coordinate_line(setup, int(c))
        if seen is None:
            continue
        line, eps_f = seen
        alone = replace(setup, line=line, eps_f=min(eps_f, setup.eps_f))
        numeric = numeric_derivatives(alone, "richardson", np.array([c]), h)
        again = compare(alone, numeric, first.analytic, rtol, atol, analytic_eps)
        # Its own line tightens the row's allowance; a disagreement it finds must be about
        # the same value, within both error estimates: a recheck far from the first value
        # shows one estimate wrong, not the gradient (a Richardson step of 32 on float32
        # logits near 1000 against an exact complex step).
        new_est = again.numeric.estimates
        same = abs(new_est.derivative[0] - est.derivative[j]) <= \
            verdicts.SAFETY * est.error[j] + new_est.error[0]
        if again.verdict[0] in ("agree", "kink") or (again.verdict[0] == "disagree" and same):
            decided.append((np.array([j]), again, np.array([0])))
    if not decided:
        return first
    return _take_rows(first, decided,
                      lambda _k: "decided by the noise along this coordinate alone")


# Agreeing rows apart by LOOSE of their value or more are measured again
# (measured_extrapolation), up to this many per check (six evaluations each), those
# nearest their allowance first.
MEASURED_ROWS = 8


def measured_rows(setup: Setup, first: Comparison, rtol, atol,
                  analytic_eps=None) -> Comparison:
    """Recheck the agreements a 0.1% error could hide in: values apart by LOOSE of
    themselves or more, which pass only by their error bound.  A fourth-order value's
    step-error bound, its gap to the second-order value it embeds, can be 30 times its
    real error in float32 (where rounding keeps the step long), and a central value's
    rounding there is larger than a longer step's.  Measured in a Richardson pass with
    one more central difference, the step error is the value's own; a row rechecked with
    a tighter allowance takes that verdict and its numbers.  Values apart by less than
    LOOSE are left to their bound: a float64 derivative of record that cancels (erfcx's,
    2.5e-7 off) would otherwise be flagged for its own rounding."""
    if rtol is not None or atol is not None or setup.noisy or setup.lines is None or \
            setup.lines.quantized:
        return first
    est = first.numeric.estimates
    a = first.analytic[first.numeric.coords]
    with np.errstate(all="ignore"):
        apart = np.abs(a - est.derivative)
        over = apart / first.allowed
        candidates = (first.verdict == "agree") & (apart > LOOSE * np.abs(est.derivative)) & \
            np.isfinite(over)
    rows = np.flatnonzero(candidates)
    rows = rows[np.argsort(-over[rows], kind="stable")][:MEASURED_ROWS]
    if rows.size == 0 or setup.runner.interrupted:
        return first
    coords = first.numeric.coords[rows]
    # Richardson's default steps, as much shorter as the rows' own were made (for a
    # pole or a kink nearby, or a value undefined farther out).
    own = first.numeric.h[rows] / plan.steps(first.numeric.method, setup.base, setup.layout,
                                               None, setup.eps)[coords]
    h = plan.steps("richardson", setup.base, setup.layout, None, setup.eps)[coords] * \
        np.minimum(1.0, own)
    numeric, measured = measured_extrapolation(setup, coords, h, est.take(rows))
    again = compare(setup, numeric, first.analytic, rtol, atol, analytic_eps)
    # Only a measured error decides: where the expansion did not show, the step may be
    # too long for the cost there (a row shortened for that reason) and the gap no bound.
    take = measured & np.isin(again.verdict, ("agree", "disagree")) & \
        (again.allowed < first.allowed[rows])
    if not take.any():
        return first
    return _take_rows(first, [(rows[take], again, np.flatnonzero(take))],
                      lambda _k: "step error measured from one more difference")


# A side whose error bound is at most this share of the gap between the two sides'
# values is settled; two settled sides apart, whose slopes hold from one rung to the next
# (within this share of the gap too), are the two slopes of a kink at the point.
SETTLED_SIDE = 0.1
# At most this many rows are rechecked (two evaluations per row and step, six to
# eighteen steps a row): where kinks are about, many stencils may have crossed one.
KINKED_ROWS = 32
# Where kinks are in evidence, agreements this far apart or more are rechecked too.
KINKED_SHARE = 1e-3


def one_sided_recheck(setup: Setup, first: Comparison, rtol, atol,
                      analytic_eps=None) -> Comparison:
    """In a low-precision cost (float32, float16), measure from each side of the point
    alone (numeric.side_rung) the rows that disagree, agree although VAGUE_SHARE or
    more apart (KINKED_SHARE where kinks are in evidence), or sit on a kink: up to
    KINKED_ROWS, disagreements nearest their allowance first.

    float32's steps are long (4e-3 at size 1): a stencil across a kink near the point
    (a ReLU 1e-4 from its hinge) mixes two slopes, and its error bound, a smooth cost's,
    does not cover that.  Rung by rung, on ever shorter steps: where the two sides
    agree within their bounds the cost is smooth across them, and they settle the row
    where they know more than the first value or show it off; where the analytic value
    lies beyond both sides by more than their bounds, it is wrong, kink or not; where
    both sides settle apart and hold there at the next rung, a kink lies at the point,
    and the analytic value must lie between them.  Where kinks are in evidence (the
    noise lines crossed some, the first pass found some, or some rung's sides stood
    apart), a row that no rung settled or confirmed is undecided: its first value's
    bound proves nothing, and neither 'disagree' nor 'agree' would be earned.  A cost
    with no kinks in evidence keeps its first verdicts."""
    if setup.lines is None or setup.noisy or setup.lines.quantized or \
            setup.runner.interrupted:
        return first
    # The complex step never leaves the point: a kink beside it does not touch its value.
    if np.finfo(setup.runner.output_dtype).eps < stencils.LOW_PRECISION_EPS or \
            first.numeric.method == "complex-step":
        return first
    est = first.numeric.estimates
    a_all = first.analytic[first.numeric.coords]
    with np.errstate(all="ignore"):
        over = np.abs(a_all - est.derivative) / first.allowed
        apart = verdicts.relative_error(a_all, est.derivative)
    usable = np.isfinite(over) & ~first.numeric.failed
    wrong = np.flatnonzero((first.verdict == "disagree") & usable)
    wrong = wrong[np.argsort(over[wrong], kind="stable")]
    # Kinks in evidence before the ladder: the lines crossed some, or the first pass
    # found some.  Then agreements within a share far below VAGUE_SHARE prove little
    # too: a stencil across a kink may be off by more than its bound (a 10% error passed
    # at 1.3% apart); the farthest apart first.
    kinks_seen = setup.lines.kinked or bool(np.any(first.verdict == "kink"))
    share = KINKED_SHARE if kinks_seen else VAGUE_SHARE
    vague = np.flatnonzero((((first.verdict == "agree") & (apart >= share)) |
                            (first.verdict == "kink")) & usable)
    vague = vague[np.argsort(-apart[vague], kind="stable")]
    rows = np.concatenate([wrong, vague])[:KINKED_ROWS]
    if rows.size == 0:
        return first
    coords = first.numeric.coords[rows]
    # How far the first stencils reached (five-point's to twice its step).
    first_reach = first.numeric.h[rows] * (2.0 if first.numeric.method == "five-point" else 1.0)
    # The first rung reaches 4 central steps, or the first stencil's reach where that is
    # longer: a kink the first stencil crossed must show there.
    central = plan.steps("central", setup.base, setup.layout, None, setup.eps)[coords]
    ladder = side_ladder(coords, np.maximum(central, first_reach / 4))
    # Steps below this many units of x's last place would be rounded away by x + s.
    shortest = 16 * setup.eps[coords] * np.abs(setup.base[coords])
    n_first, err_first = est.derivative[rows], est.error[rows]
    # The sides measure their own curvature: the lines' slope and bends are every
    # coordinate's (a pole in another parameter would swamp these rows' allowance).
    own_bends = replace(setup, line=replace(setup.line, slope=0.0, curvature_s2=0.0,
                                            third=0.0))
    parts, open_rows = [], np.arange(rows.size)
    decided = np.zeros(rows.size, dtype=bool)
    kink_before = np.full((2, rows.size), np.nan)  # the slopes of a kink seen one rung up
    last = np.full((4, rows.size), np.nan)         # each row's last sides, step, bound
    last_smooth = np.zeros(rows.size, dtype=bool)
    for k in range(SIDE_RUNGS):
        if open_rows.size == 0 or setup.runner.interrupted:
            break
        rung = side_rung(setup, ladder, open_rows, k)
        ok = ~ladder.failed[open_rows]
        at = rows[open_rows]
        last[:, open_rows] = rung.plus, rung.minus, rung.step, \
            np.maximum(rung.plus_error, rung.minus_error)
        gap = np.abs(rung.plus - rung.minus)
        # Smooth: the sides agree, and so do their drifts v(s) - v(2s) (both f3 s^2 on
        # a smooth cost; a side across a kink drifts by a share of the jump instead),
        # within their rounding (1.5 times v's each) and half the larger drift.
        drift_plus, drift_minus = rung.plus_error - rung.rounding, rung.minus_error - rung.rounding
        same_drift = np.abs(drift_plus - drift_minus) <= \
            3 * rung.rounding + 0.5 * np.maximum(drift_plus, drift_minus)
        smooth = ok & (gap <= rung.plus_error + rung.minus_error) & same_drift
        low, high = np.minimum(rung.plus, rung.minus), np.maximum(rung.plus, rung.minus)
        settled_apart = ok & ~smooth & (np.maximum(rung.plus_error, rung.minus_error) <=
                                        SETTLED_SIDE * gap)
        with np.errstate(invalid="ignore"):
            held = (np.abs(low - kink_before[0, open_rows]) <= SETTLED_SIDE * gap) & \
                (np.abs(high - kink_before[1, open_rows]) <= SETTLED_SIDE * gap)
        at_kink = settled_apart & held
        kinks_seen |= bool(np.any(ok & ~smooth))   # two sides apart beyond their bounds
        last_smooth[open_rows] = smooth
        kink_before[:, open_rows] = np.where(settled_apart, [low, high], np.nan)
        # The value of the more precise side, trusted only to the less precise one's
        # bound: a side across a kink much nearer than its steps looks smooth (its
        # slopes drift like a curvature), and only the other side can show it.
        plus_side = rung.plus_error <= rung.minus_error
        value = np.where(plus_side, rung.plus, rung.minus)
        error = np.maximum(rung.plus_error, rung.minus_error)
        rounding = np.minimum(rung.rounding, error)
        m = open_rows.size
        numeric = Numeric(coords[open_rows], rung.step, np.full((m, 2), setup.f0),
                          stencils.Estimates(value, error - rounding, rounding, rung.curvature,
                                             np.zeros(m), rung.noise),
                          np.zeros(m, dtype=bool), [""] * m, np.ones(m, dtype=bool), "central")
        again = compare(own_bends, numeric, first.analytic, rtol, atol, analytic_eps)
        knows_more = again.allowed < first.allowed[at]
        shown_off = np.abs(value - n_first[open_rows]) > \
            verdicts.SAFETY * err_first[open_rows] + error
        # Off: the analytic value lies beyond both sides, on one side of them, by more
        # than the allowance of the less precise one.  Kink or not, the derivative is not
        # there: each side's bound covers what a kink within its reach does to it.
        a = first.analytic[numeric.coords]
        says_no = ok & (again.verdict == "disagree") & \
            (np.minimum(a - low, high - a) < -again.allowed)
        # Smooth sides settle a row where they know more or show the first value off:
        # their verdict and numbers replace it; so do sides off a first agreement.  Sides
        # off where the first value disagreed too confirm that with values no kink
        # spoiled: the first (more precise) numbers stay.
        take = (smooth & (knows_more | shown_off)) | \
            (says_no & (first.verdict[at] != "disagree"))
        confirmed = ~take & says_no
        if at_kink.any():
            kinks = stencils.Kinks(at_kink, low, high, rung.plus_error + rung.minus_error)
            again.verdict = verdicts.apply_kinks(again.verdict, a, kinks, again.allowed,
                                                 again.details)
            take |= at_kink
        for j in np.flatnonzero(take):
            if again.details[j]:
                continue
            if smooth[j]:
                again.details[j] = (f"decided by one-sided differences at step "
                                    f"{rung.step[j]:.3g} (no kink on the side used)")
            else:
                again.details[j] = (f"analytic outside the one-sided values {low[j]:.6g} "
                                    f"and {high[j]:.6g} at step {rung.step[j]:.3g}")
        if take.any():
            parts.append((at[take], again, np.flatnonzero(take)))
        decided[open_rows] |= take | confirmed
        # Shorter rungs round SIDE_SHRINK times more: go on only while that can still
        # know more than the first value, and x + s keeps the step.
        more = ok & ~(smooth | at_kink | take | confirmed) & \
            (SIDE_SHRINK * rung.rounding < first.allowed[at]) & \
            (rung.step / SIDE_SHRINK >= shortest[open_rows])
        open_rows = open_rows[more]
    # Undecided: a row no rung settled or confirmed.  On lines across kinks its first
    # value's error bound, a smooth cost's, proves nothing, and in float32 the one-sided
    # values short enough to miss the kinks may round too much to tell.
    unresolved = np.flatnonzero(~decided & ~ladder.failed & kinks_seen &
                                np.isin(first.verdict[rows], ("disagree", "agree")))
    if not parts and unresolved.size == 0:
        return first
    out = _take_rows(first, parts, lambda _k: "") if parts else \
        replace(first, verdict=first.verdict.copy(), details=list(first.details))
    names = []
    for j in unresolved:
        r = rows[j]
        out.verdict[r] = "noisy"
        sides = (f"one-sided values {last[0, j]:.6g} and {last[1, j]:.6g} at step "
                 f"{last[2, j]:.3g}")
        out.details[r] = (f"undecided: kinks near the point, and the {sides}, each "
                          f"within {last[3, j]:.2g}, are too rounded to tell") \
            if last_smooth[j] else \
            f"undecided: a kink lies within every step long enough to tell ({sides})"
        names.append(coordinate_name(setup.layout, int(coords[j])))
    notes = list(out.notes)
    if names:
        notes.append(say.kinks_unresolved(names))
    return replace(out, notes=notes,
                   unresolved=tuple(out.unresolved) + tuple(int(c) for c in coords[unresolved]))


def rows_of(setup: Setup, comp: Comparison) -> RowColumns:
    """The report's rows of the finished coordinates, as columns: the report builds
    Row objects (names, index tuples) only when they are read."""
    num = comp.numeric
    done = num.done
    at = np.cumsum(done) - 1      # each finished coordinate's row
    details = {int(at[j]): d for j, d in enumerate(comp.details) if d != "" and done[j]}
    coords = _finished(num.coords, done)
    return RowColumns.from_arrays(setup.layout, coords, comp.analytic[coords],
                                  _finished(num.estimates.derivative, done),
                                  _finished(comp.verdict, done), details,
                                  _finished(num.estimates.error, done))


def _finished(values: np.ndarray, done: np.ndarray) -> np.ndarray:
    """The entries of the finished coordinates: the array itself when all finished (a
    view, where a full check would copy every column once more)."""
    return values if done.all() else values[done]


@interrupts_as_check_interrupted("gradient check")
@takes_framework_values
def compare_gradient(cost, params, gradient=None, *, method="auto", step=None, rtol=None,
                     atol=None, coordinates=None, seed=None, executor=None, vectorized=False,
                     progress=None, complex_safe=None, allow_undecided=False,
                     with_rng=False) -> GradientReport:
    """Compare the analytic gradient with numeric derivatives, coordinate by coordinate.

    Each coordinate's numeric derivative comes with an error estimate; it agrees with
    the analytic value when they differ by less than the estimate allows (or by numpy's
    ``atol + rtol * |numeric|`` when either tolerance is given).  Agreement at one
    point does not prove the gradient right elsewhere.

    Parameters
    ----------
    cost : callable
        ``cost(params) -> float``; ``cost(params, rng)`` with ``with_rng=True``.
    params : array_like, float, or dict / list / tuple nest of those
        The point (torch tensors, modules and JAX arrays with the optional extras).
        Never modified.
    gradient : callable, array-like nest, or None
        The analytic gradient: a function of params (like the cost), its values in the
        structure of params, or None for autograd's (the framework's for torch / JAX).
    method : str
        "auto" (default), "central", "forward", "backward", "five-point", "richardson"
        or "complex-step".
    step : float or a nest like params, optional
        Absolute steps; automatic when None.
    rtol, atol : float, optional
        Fixed tolerances instead of the error estimates.
    coordinates : int, dict, or None
        All coordinates (None), k sampled per parameter (int), or lists of flat indices
        per parameter name (dict).
    seed : int, optional
        Seeds the sampled coordinates, the probe directions and with_rng's draw.
    executor : concurrent.futures.Executor, optional
        Spread the cost's calls over it.
    vectorized : bool
        The cost takes a batch (a leading axis on every leaf) and returns one value each.
    progress : bool, optional
        Show a progress bar (None: when the sweep takes more than a few seconds).
    complex_safe : bool, optional
        True: use the complex step without probing; False: never for "auto".
    allow_undecided : bool
        Let a check in which no coordinate could be decided (noisy) pass.
    with_rng : bool
        Call ``cost(params, rng)`` and ``gradient(params, rng)`` with a generator seeded
        the same way at every call, so a random cost's one draw is checked exactly.

    Returns
    -------
    GradientReport
        ``.passed``, ``.rows`` (one per checked coordinate), ``.mismatches``, ``.hints``,
        ``.notes``, ``.problems``, suggested tolerances; ``str()`` is the text report.

    Raises
    ------
    CheckInputError, CheckTypeError
        Bad params, gradient or options, or a cost that fails at params.
    CheckInterrupted
        Ctrl-C or a failed executor; ``.report`` holds the coordinates finished.

    Examples
    --------
    >>> import numpy as np
    >>> report = compare_gradient(lambda w: np.sum(w ** 2), np.array([1.0, -2.0]),
    ...                           lambda w: 2 * w)
    >>> report.passed
    True
    >>> compare_gradient(lambda w: np.sum(w ** 2), np.array([1.0, -2.0]),
    ...                  lambda w: w).passed
    False
    """
    checked = plan.check_options(method=method, step=step, rtol=rtol, atol=atol,
                                 coordinates=coordinates, seed=seed, executor=executor,
                                 vectorized=vectorized, progress=progress,
                                 complex_safe=complex_safe, allow_undecided=allow_undecided,
                                 with_rng=with_rng)
    rtol, atol = checked["rtol"], checked["atol"]
    plan.check_gradient(gradient)
    early_notes = []
    _check_rng_argument(cost, with_rng)
    if with_rng:
        cost, gradient, early_notes = _seeded(cost, gradient, seed, vectorized)
    setup = prepare(cost, params, vectorized=vectorized, executor=executor, progress=progress)
    if setup.runner.interrupted:    # during the noise lines or probes: nothing checked yet
        raise setup.runner.stop_error(None)
    analytic, analytic_eps = analytic_values(cost, setup.base, setup.layout, gradient,
                                             vectorized)
    if setup.problems:  # a random cost: no coordinate can be judged
        return GradientReport(rows=[], method=method, evaluations=setup.runner.evaluations,
                              total=setup.layout.size, notes=setup.notes,
                              problems=setup.problems)
    notes = list(early_notes)
    if probes.flat_but_sloped(setup.lines, analytic, setup.f0):
        notes.append(say.flat_but_sloped())
    coords = plan.choose_coordinates(setup.layout, coordinates, seed, analytic)
    used, method_notes = resolve_method(setup, method, seed, complex_safe)
    method_notes += warn_if_long(setup.runner, used, coords.size, setup.layout.size)
    h = plan.steps(used, setup.base, setup.layout, step, setup.eps)
    numeric = numeric_derivatives(setup, used, coords, h, refine=step is None)
    comp = compare(setup, numeric, analytic, rtol, atol, analytic_eps)
    comp = second_opinion(setup, comp, rtol, atol, analytic_eps)
    if step is None:
        comp = shorter_steps(setup, comp, rtol, atol, analytic_eps)
        comp = own_lines(setup, comp, rtol, atol, analytic_eps)
        comp = measured_rows(setup, comp, rtol, atol, analytic_eps)
        comp = one_sided_recheck(setup, comp, rtol, atol, analytic_eps)
    report = finish(setup, comp, used, analytic_eps=analytic_eps,
                    allow_undecided=allow_undecided,
                    probe_unsampled=_worth_probing(setup.layout.size - coords.size, used),
                    seed=seed,
                    notes=notes + method_notes)
    report.reevaluation = Reevaluation(setup.runner.cost, setup.layout, setup.base.copy(),
                                       np.array(analytic, dtype=float), h, used, setup.f0,
                                       setup.eps_f, setup.line.noise, setup.runner.vectorized)
    stop = setup.runner.stop_error(report)   # Ctrl-C or a failed executor: the partial report
    if stop is not None:
        raise stop
    return report


# The remainder-order probe through all coordinates costs about 34 evaluations: a sampled
# check runs it where the coordinates left out would have cost more than this to check.
PROBE_UNSAMPLED_ABOVE = 100


def _worth_probing(left_out: int, method: str) -> bool:
    return left_out * len(plan.OFFSETS[method]) > PROBE_UNSAMPLED_ABOVE


# A check estimated to run longer than this says so before it starts its sweep.
LONG_CHECK_SECONDS = 120.0


def warn_if_long(runner: CostRunner, method: str, checked: int, total: int) -> list:
    """After the first evaluations: the sweep's time from the measured time of one call.
    Past LONG_CHECK_SECONDS, a LongCheckWarning (printed at once by the command line) and
    the same sentence as a note, with the quicker ways to check."""
    calls = len(plan.OFFSETS[method]) * checked
    seconds = calls * runner.seconds_per_call
    if runner.executor is not None:
        seconds /= os.cpu_count() or 1          # at best; the executor does not say
    if seconds <= LONG_CHECK_SECONDS:
        return []
    message = say.long_check(seconds, calls, runner.seconds_per_call, sampled=checked < total,
                             spread=runner.executor is not None or runner.vectorized)
    warnings.warn(message, LongCheckWarning, stacklevel=5)   # the caller of compare_gradient
    return [message]


# What the signatures of plain functions say, by _signature_key: a test suite checks the
# same cost many times, and inspect.signature cost more than a small check's evaluations.
_SIGNATURE_FACTS: dict = {}


def _signature_key(fun):
    """What fixes a plain function's positional parameters (its code and how many
    defaults it has); None for other callables (methods, partials, wrapped functions,
    objects), whose signatures are read every time."""
    if not inspect.isfunction(fun) or "__wrapped__" in fun.__dict__ or \
            "__signature__" in fun.__dict__:
        return None
    return fun.__code__, len(fun.__defaults__ or ()), tuple(fun.__kwdefaults__ or ())


def _required_positional(fun) -> int:
    """How many positional arguments `fun` requires (-1 where its signature is unknown)."""
    key = _signature_key(fun)
    if key is not None and key in _SIGNATURE_FACTS:
        return _SIGNATURE_FACTS[key]
    required = _count_required(fun)
    if key is not None:
        if len(_SIGNATURE_FACTS) >= 256:
            _SIGNATURE_FACTS.clear()
        _SIGNATURE_FACTS[key] = required
    return required


def _count_required(fun) -> int:
    try:
        parameters = inspect.signature(fun).parameters.values()
    except (TypeError, ValueError):
        return -1
    kinds = (inspect.Parameter.POSITIONAL_ONLY, inspect.Parameter.POSITIONAL_OR_KEYWORD)
    return sum(1 for p in parameters if p.kind in kinds and p.default is p.empty)


def _check_rng_argument(cost, with_rng) -> None:
    """A cost of (params, rng) without with_rng, or with_rng for a cost of params alone:
    one sentence now, instead of a TypeError from inside the first call."""
    required = _required_positional(cost)
    if not with_rng and required == 2:
        raise CheckInputError("cost: it requires two arguments; if the second is a random "
                              "generator, pass with_rng=True (--with-rng on the command line) "
                              "to call it as cost(params, rng) with the same seed at every "
                              "call")
    if with_rng and required in (0, 1) and not _takes_two(cost):
        raise CheckInputError("cost: with_rng=True calls cost(params, rng), but this cost "
                              "takes one argument; drop with_rng or add the rng argument")


def _takes_two(fun) -> bool:
    try:
        inspect.signature(fun).bind(None, None)
    except TypeError:
        return False
    except ValueError:
        return True
    return True


def _seeded(cost, gradient, seed, vectorized) -> tuple:
    """with_rng=True: cost(params, rng) and gradient(params, rng) with one seed for every
    call.  Returns the wrapped cost and gradient and the note that says which seed."""
    if vectorized:
        raise CheckInputError("with_rng=True and vectorized=True cannot be combined: a batch "
                              "call gets one generator, so its rows would not share a draw; "
                              "pass vectorized=False")
    draw = draw_seed(seed)
    cost = SeededCall(cost, draw)
    if callable(gradient):
        gradient = SeededCall(gradient, draw)
    return cost, gradient, [say.seeded_draw(draw, callable(gradient))]


def _suggested_tolerances(setup: Setup, comp: Comparison, method: str) -> tuple:
    """(rtol, atol) the agreeing rows pass with this method, and (rtol, atol) for central
    differences where they differ (what people pin in their own tests; from the central
    error model at these points, no evaluations spent), else (None, None)."""
    done = comp.numeric.done
    coords = comp.numeric.coords
    a, est = comp.analytic[coords], comp.numeric.estimates
    n = est.derivative
    rtol_s, atol_s = verdicts.suggest_tolerances(_finished(a, done), _finished(n, done),
                                                 _finished(comp.verdict, done))
    if method == "central" or rtol_s is None:
        return rtol_s, atol_s, None, None
    s = setup.scale[coords]
    error = central_error(n, setup.f0, setup.base[coords], setup.eps[coords], setup.eps_f,
                          setup.line.noise,
                          np.maximum(est.curvature, setup.line.curvature_s2 / s ** 2),
                          8 * setup.line.third / s ** 3)
    central = central_tolerances(a[done], n[done], comp.verdict[done], error[done])
    if central == (rtol_s, atol_s):
        return rtol_s, atol_s, None, None
    return (rtol_s, atol_s) + tuple(central)


def finish(setup: Setup, comp: Comparison, method: str, title="gradient check",
           analytic_eps=None, allow_undecided=False, probe_unsampled=False, seed=None,
           notes=(), problems=()):
    """Rows, hints, notes and suggested tolerances: the report of one comparison.

    probe_unsampled: the coordinates are a sample, so the remainder-order probe also
    runs along a random direction through all of them (a few dozen evaluations).
    notes, problems: what the earlier stages found (method choice, probes, a search that
    ran out of budget), added after the setup's own."""
    rtol_s, atol_s, central_rtol, central_atol = _suggested_tolerances(setup, comp, method)
    hints = _hints(setup, comp)
    rows = rows_of(setup, comp)     # after the hints: their temporaries are gone by now
    notes = list(setup.notes) + list(notes) + list(comp.notes)
    problems = list(setup.problems) + list(problems)
    if analytic_eps is not None and analytic_eps > np.finfo(np.float64).eps:
        notes.append(say.lower_precision_gradient(analytic_eps))
    if comp.numeric.undefined:
        notes.append(say.undefined_stencils([coordinate_name(setup.layout, c)
                                             for c in comp.numeric.undefined]))
    kinked = rows.labels(np.flatnonzero(rows.coded(("kink",))))[0]
    if kinked:
        notes.append(say.on_kinks(kinked))
    undecided = rows.labels(np.flatnonzero(rows.coded(("noisy",))))[0]
    unresolved = {coordinate_name(setup.layout, c) for c in comp.unresolved}
    noisy = [name for name in undecided if name not in unresolved]
    if noisy:
        notes.append(say.undecided(noisy, setup.line.noise))
    if len(rows) and len(undecided) == len(rows) and not allow_undecided:
        problems.append(say.nothing_decided(len(rows)))
    any_failing = bool(rows.failing.any())
    if any_failing and not setup.runner.interrupted:
        if probes.descent_uphill(setup.runner, comp.analytic, setup.scale, setup.f0,
                                 setup.line.noise, setup.eps_f):
            hints.append(uphill_hint())
    extra = {}
    if probe_unsampled and not setup.runner.interrupted and np.all(np.isfinite(comp.analytic)):
        probe = remainder_along(setup.runner, setup.base, setup.layout, setup.f0, setup.eps_f,
                                setup.line.noise, comp.analytic, seed, analytic_eps)
        extra = {"remainder_order": probe.order, "remainder_passed": probe.passed}
        outside_note(probe, len(rows), setup.layout.size, any_failing, notes, problems)
    return GradientReport.from_columns(
        rows, method=method, evaluations=setup.runner.evaluations, total=setup.layout.size,
        hints=hints, notes=notes, problems=problems, suggested_rtol=rtol_s,
        suggested_atol=atol_s, interrupted=setup.runner.interrupted, title=title, extra=extra,
        suggested_central_rtol=central_rtol, suggested_central_atol=central_atol)


def _hints(setup: Setup, comp: Comparison) -> list:
    """The hints of the finished rows.  They test their patterns against the tool's own
    allowance, never the caller's rtol.  They explain disagreements: none, no hints."""
    if not np.any(comp.verdict == "disagree"):
        return []
    done = comp.numeric.done
    coords = comp.numeric.coords
    a = comp.analytic[coords]
    n = comp.numeric.estimates.derivative
    return mismatch_hints(setup.layout, _finished(coords, done), setup.base,
                          _finished(a, done), _finished(n, done), _finished(comp.verdict, done),
                          _finished(comp.own_allowed, done), _finished(comp.kinks.found, done))


@interrupts_as_check_interrupted("noise estimate")
def estimate_noise(cost, params):
    """The noise level of the cost's computed values near params (More & Wild, 2011).

    Parameters
    ----------
    cost : callable
        ``cost(params) -> float``.
    params : array_like or a nest of those
        The point; never modified.

    Returns
    -------
    NoiseEstimate
        ``.level`` (absolute, one standard deviation of a value), ``.relative``,
        ``.order``, the values of the first line and their spacing, ``.evaluations``.

    Raises
    ------
    CheckInputError, CheckTypeError
        Bad params, or a cost that fails at params.
    CheckInterrupted
        Ctrl-C (``.report`` is None).

    Examples
    --------
    >>> import numpy as np
    >>> smooth = estimate_noise(lambda x: np.sum(np.sin(x)), np.array([0.3, 1.1]))
    >>> bool(smooth.relative < 1e-13)
    True
    """
    setup = prepare(cost, params, repeat=False)
    if setup.runner.interrupted:
        raise setup.runner.stop_error(None, "noise estimate")
    relative = float(setup.line.noise / abs(setup.f0)) if setup.f0 else float("inf")
    return NoiseEstimate(level=setup.line.noise, relative=relative,
                         order=setup.line.order, values=setup.line.values,
                         spacing=setup.line.spacing, evaluations=setup.runner.evaluations)


@dataclass
class NoiseEstimate:
    """The result of `estimate_noise`: how precise the cost's values are near a point.

    Attributes
    ----------
    level : float
        Absolute noise of one cost value (a standard deviation).
    relative : float
        level / |f(params)| (inf where the cost is 0).
    order : int
        The difference order the estimate came from (0: no noise seen).
    values : ndarray
        The cost values along the first noise line.
    spacing : float
        That line's spacing, relative to each coordinate's scale.
    evaluations : int
        Cost evaluations spent.
    """
    level: float          # absolute noise of one cost value (a standard deviation)
    relative: float       # level / |f(params)|
    order: int            # difference order the estimate came from (0: no noise seen)
    values: np.ndarray    # the cost values along the first line
    spacing: float        # the first line's spacing, relative to each coordinate's scale
    evaluations: int
