"""Numeric derivatives at chosen coordinates, with retries where a stencil misleads.

Between probes and verdicts: one pass of a stencil per coordinate (plan's
requests, evaluate's runner, stencils' numerics), then, only for the coordinates
that need it, points where the cost is not finite are redone with shorter steps
and finally one-sided differences, and fourth-order methods whose embedded
lower-order value says the step was too long are redone once with a balanced step.
Each function returns new results; what it was given is left as it was.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from . import plan, stencils
from .evaluate import describe_failure
from .probes import Setup

# Five-point and Richardson redo a coordinate with a shorter step when the gap to their
# embedded lower-order value is above this fraction of the gradient's term size (see
# stencils.term_scale) and dominates rounding: the automatic step max(|x|, 1) * eps^(1/5)
# was too long for the coordinate's curvature (e.g. x4, x5 of Osborne 1 in More, Garbow
# & Hillstrom, whose cost varies on a scale of 1/300 in them).
REFINE_ABOVE = 1e-7
# ... or above this fraction of the value itself: terms far above it (a coordinate whose
# scale, max(|x|, 1), is far above the length its cost varies on) must not hide a value
# known to 0.2% only (gammaln at 1e-7).
REFINE_SHARE = 1e-4
# A stencil that meets a non-finite value (a log or sqrt stepped across 0) is redone with
# its step cut by SHORTEN_BY, up to SHORTEN_TIMES times (2^-36 of the step at most: ndtri
# at 1e-10 needs 2^-24 of 5e-4), then
# one-sided on the side where the cost is defined.
SHORTEN_BY = 8.0
SHORTEN_TIMES = 12
# ... but never below this many units of x's last place: a step that x + h rounds away
# would "find" the cost finite at x itself and a derivative of 0.
SHORTEST_ULPS = 1024.0


@dataclass
class Numeric:
    """Numeric derivatives at some coordinates, with what they were computed from."""
    coords: np.ndarray
    h: np.ndarray                # step of each coordinate (the pass its value came from)
    values: np.ndarray           # (coordinates, offsets) cost values of that pass
    estimates: stencils.Estimates
    failed: np.ndarray           # a stencil point raised for this coordinate
    details: list                # text per coordinate ("" when fine)
    done: np.ndarray             # finished before an interrupt
    method: str
    undefined: list = field(default_factory=list)   # coordinates that met non-finite values

    def copy(self) -> "Numeric":
        """An independent copy, for a stage that changes some of its coordinates."""
        return Numeric(self.coords.copy(), self.h.copy(), self.values.copy(),
                       self.estimates.take(np.arange(len(self.coords))), self.failed.copy(),
                       list(self.details), self.done.copy(), self.method,
                       list(self.undefined))


def numeric_derivatives(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray,
                        refine: bool = True) -> Numeric:
    """Numeric derivatives at `coords`; non-finite stencil points are redone with shorter
    or one-sided steps, and fourth-order methods refine badly scaled coordinates once."""
    numeric = one_pass(setup, method, coords, h[coords])
    if setup.runner.interrupted:
        return numeric
    numeric = redo_undefined(setup, numeric)
    if method in stencils.REFINABLE and refine and not setup.runner.interrupted:
        numeric = shorten_long_steps(setup, numeric)
        numeric = refine_steps(setup, numeric)
    return numeric


# A fourth-order value whose gap to its embedded second-order value is above this share
# of itself (and above rounding and LONG_STEP_FLOOR of |f0| / scale), or whose stencil
# shows a kink, came from a step longer than the length the cost varies on there
# (gammaln at 1e-7, whose step of 5e-4 crosses the pole; sin(1e6 x)): such rows are
# redone at steps SHORTEN_BY shorter, up to LONG_STEP_TIMES times, until they are not.
LONG_STEP_SHARE = 0.1
LONG_STEP_FLOOR = 1e-6
LONG_STEP_TIMES = 8
STEADY_KINK = 0.1


def _too_long(numeric: Numeric, f0: float, scale: np.ndarray) -> np.ndarray:
    """Rows whose step looks longer than the cost's length there (see LONG_STEP_SHARE)."""
    est = numeric.estimates
    with np.errstate(all="ignore"):
        kinks = stencils.find_kinks(numeric.method, numeric.values, f0, numeric.h, est.noise)
        rough = (est.gap > LONG_STEP_SHARE * np.abs(est.derivative)) & \
            (est.gap > est.rounding) & (est.gap > LONG_STEP_FLOOR * abs(f0) / scale)
    finite = np.isfinite(numeric.values.real).all(axis=1)
    return (kinks.found | rough) & finite & ~numeric.failed, kinks


def shorten_long_steps(setup: Setup, numeric: Numeric) -> Numeric:
    """Rows whose step is too long for the cost there (_too_long): passes at steps
    SHORTEN_BY shorter until the row is not, keeping each value whose error estimate is
    smaller (or that left a kink behind).  A kink whose one-sided slopes stay put as the
    step shrinks is a kink at the point itself (a ReLU at 0): it stops there."""
    long, kinks = _too_long(numeric, setup.f0, setup.scale[numeric.coords])
    if not long.any():
        return numeric
    out = numeric.copy()
    rows = np.flatnonzero(long)
    h = out.h[rows]
    moved = np.zeros(rows.size)     # how far the slopes moved at the last shortening
    last = out.estimates.take(rows)  # the last pass's values of the rows still going
    unconfirmed = np.zeros(len(out.coords))   # the last jump of a row that ended on one
    for _ in range(LONG_STEP_TIMES):
        if rows.size == 0 or setup.runner.interrupted:
            break
        h = h / SHORTEN_BY
        again = one_pass(setup, out.method, out.coords[rows], h)
        still, new_kinks = _too_long(again, setup.f0, setup.scale[out.coords[rows]])
        ok = np.isfinite(again.values.real).all(axis=1) & ~again.failed & again.done
        old = out.estimates.take(rows)
        was_kink = kinks.found[rows] if kinks.found.size == len(out.coords) else \
            np.zeros(rows.size, dtype=bool)
        # Relative errors: near a pole the value grows as the step shrinks.
        with np.errstate(all="ignore"):
            better = ok & ((again.estimates.error * np.abs(old.derivative) <
                            old.error * np.abs(again.estimates.derivative)) |
                           (was_kink & ~new_kinks.found))
            # A value that moved by more than both error estimates proves the longer
            # step's estimate wrong, and leaves the shorter one's (the same model) unproven:
            # one more shortening must confirm it, whatever rounding says; a row that
            # ends on such a jump is known only to within it (a smooth bend on a length
            # the precision cannot resolve: float32, a smoothing width of 1e-3).
            jump = np.abs(again.estimates.derivative - last.derivative)
            jumped = ok & (jump > again.estimates.error + last.error)
        # The curvature kept for the terms (term_sizes) is the longer step's where that is
        # smaller: a bend on a short length curves the cost that much only there.
        again.estimates.curvature = np.fmin(again.estimates.curvature, old.curvature)
        _adopt(out, rows[better], again, np.flatnonzero(better))
        # Steady: both slopes moved by less than a tenth of the jump between them, and by
        # no more than at the shortening before (within their slack).  At a kink the
        # slopes settle as the step shrinks (by h |f2|); a smooth cost that bends on a
        # length L shorter than the step (sqrt(x^2 + 1e-12)) looks kinked too, but its
        # slopes move by about L / h, more at each shorter step.
        spread = STEADY_KINK * np.abs(kinks.high[rows] - kinks.low[rows])
        move = np.maximum(np.abs(new_kinks.low - kinks.low[rows]),
                          np.abs(new_kinks.high - kinks.high[rows]))
        steady_kink = new_kinks.found & was_kink & (move <= spread) & \
            (move <= np.maximum(moved, new_kinks.slack))
        # Rounding ends the search, except for a kink not yet shown steady: its rounding
        # may be a bend on a short length that the noise line took for noise.
        rounding_bound = (again.estimates.rounding >= again.estimates.truncation) & \
            ~new_kinks.found
        unconfirmed[rows] = np.where(jumped, jump, 0.0)
        go_on = ok & ((still & ~rounding_bound) | jumped) & ~steady_kink
        kinks = _rows_kinks(kinks, rows, new_kinks, len(out.coords))
        last.put(np.flatnonzero(ok), again.estimates.take(np.flatnonzero(ok)))
        keep = np.flatnonzero(go_on)
        rows, h, moved, last = rows[keep], h[keep], move[keep], last.take(keep)
    out.estimates.truncation = np.maximum(out.estimates.truncation, unconfirmed)
    return out


# A mismatch whose step is more than LENGTH_TIMES the length its cost varies on there,
# |f1| / |f2| from its own stencil, is measured again at steps SHORTEN_BY shorter, up to
# LONG_STEP_TIMES times, until two in a row agree within their errors: a parameter of
# natural size 1e-6 at x = 7e-7 gets the automatic step of 5e-4 (sized on max(|x|, 1)),
# over which log1p((x / 1e-6)^2) looks like a quadratic whose differences all agree.
LENGTH_TIMES = 8.0


def long_for_length(numeric: Numeric) -> np.ndarray:
    """Rows whose step is more than LENGTH_TIMES the cost's length |f1| / |f2| there."""
    est = numeric.estimates
    with np.errstate(all="ignore"):
        length = np.abs(est.derivative) / est.curvature
    return (numeric.h > LENGTH_TIMES * length) & np.isfinite(est.derivative) & \
        ~numeric.failed


def walk_down(setup: Setup, numeric: Numeric, rows: np.ndarray) -> tuple:
    """Richardson values of numeric's `rows` at steps SHORTEN_BY shorter each time, until
    two in a row agree within their errors, and on while the step error dominates.
    Returns (Numeric of those rows, converged): each row's value at its last step
    taken, and whether two in a row agreed."""
    h = numeric.h[rows].copy()
    coords = numeric.coords[rows]
    last = one_pass(setup, "richardson", coords, h)   # the same step, in Richardson
    out = last.copy()
    converged = np.zeros(rows.size, dtype=bool)
    todo = np.arange(rows.size)
    for _ in range(LONG_STEP_TIMES):
        if todo.size == 0 or setup.runner.interrupted:
            break
        h[todo] /= SHORTEN_BY
        again = one_pass(setup, "richardson", coords[todo], h[todo])
        ok = np.isfinite(again.values.real).all(axis=1) & ~again.failed & again.done
        prev, new = last.estimates.take(todo), again.estimates
        distance = np.abs(new.derivative - prev.derivative)
        agree = ok & (distance <= new.error + prev.error)
        # The shorter step's value, trusted to the distance between the two shrunk as a
        # second-order error would shrink (Richardson's is fourth-order: conservative).
        new.truncation = np.where(agree, np.maximum(new.truncation,
                                                    distance / SHORTEN_BY ** 2),
                                  new.truncation)
        # A settled row takes a shorter step only where it agrees again, more tightly.
        was = converged[todo]
        take = ok & (~was | (agree & (new.error < out.estimates.error[todo])))
        pick = np.flatnonzero(take)
        out.estimates.put(todo[pick], new.take(pick))
        out.h[todo[pick]] = h[todo[pick]]
        out.values[todo[pick]] = again.values[pick]
        last.estimates.put(todo[ok], new.take(np.flatnonzero(ok)))
        # Two values that agree at steps still long for the length the cost varies on
        # (|f1| / |f2| at the shorter step) prove nothing: a parameter of natural size 1e-8
        # stepped by 1e-4 and 1e-5 sees only a quadratic coupling term, the same at both,
        # while the term that varies on 1e-8 is about even over either step.
        with np.errstate(all="ignore"):
            long_now = h[todo] > LENGTH_TIMES * np.abs(new.derivative) / new.curvature
        converged[todo[agree & ~long_now]] = True
        # Settled rows go on while step error, not rounding, dominates: it shrinks fast.
        go_on = ok & ((~agree & ~was) | (agree & long_now & (new.rounding < new.error / 2)) |
                      (take & agree & (new.rounding < new.truncation)))
        todo = todo[go_on]
    return out, converged


def _rows_kinks(kinks: stencils.Kinks, rows, new: stencils.Kinks, n: int) -> stencils.Kinks:
    """The kinks of all n rows, with those at `rows` replaced by `new`."""
    found, low, high, slack = (np.array(a, dtype=float) for a in
                               (kinks.found, kinks.low, kinks.high, kinks.slack))
    found[rows], low[rows], high[rows], slack[rows] = new.found, new.low, new.high, new.slack
    return stencils.Kinks(found.astype(bool), low, high, slack)


def refine_steps(setup: Setup, numeric: Numeric) -> Numeric:
    """Fourth-order values whose gap to their embedded second-order value is large next
    to rounding: one more pass at a step that balances the two, and of the two values
    the one with the smaller modelled error (stencils.extrapolation_error)."""
    est = numeric.estimates
    terms = term_sizes(setup, numeric)
    finite = np.isfinite(numeric.values.real).all(axis=1)
    # The step balance uses the plain rounding bound of the stencil's values, not the
    # margins the error estimate adds (stencils.SUM_ROUNDING and the terms' rounding).
    rounding = stencils.VALUE_ROUNDING[numeric.method] * est.noise / numeric.h
    large = (est.gap > REFINE_ABOVE * terms) | (est.gap > REFINE_SHARE * np.abs(est.derivative))
    redo = large & (est.gap > 64 * rounding) & ~numeric.failed & finite
    if not redo.any():
        return numeric
    idx = np.flatnonzero(redo)
    h1 = numeric.h[idx]
    balance = est.take(idx)
    balance.rounding = rounding[idx]
    h2 = stencils.refined_steps(balance, h1, numeric.method)
    second = one_pass(setup, numeric.method, numeric.coords[idx], h2)
    ok = ~second.failed & second.done & np.isfinite(second.values.real).all(axis=1)
    plain = second.estimates.take(np.arange(idx.size))
    plain.rounding = stencils.VALUE_ROUNDING[numeric.method] * plain.noise / h2
    use = stencils.pick_refined(balance, h1, plain, h2, numeric.method) & ok
    keep = ~use & ok
    first, other = est.take(idx), second.estimates
    distance = np.abs(first.derivative - other.derivative)
    out = numeric.copy()
    # Kept first value: the triangle bound, its distance to the second plus the second's
    # own error, where that is below its gap (the conservative bound it had).
    truncation = first.truncation.copy()
    truncation[keep] = np.minimum(first.gap, distance + other.error)[keep]
    out.estimates.truncation[idx] = truncation
    # Chosen second value: the distance between the two, or its own modelled error, but
    # never above its own gap: a first value far off (a step much too long) says nothing
    # about the second beyond what its own lower-order gap does (Ridders' bound).
    modelled = stencils.extrapolation_error(other, h2, numeric.method) - other.rounding
    other.truncation = np.maximum(np.minimum(distance, other.gap), modelled)
    pos = np.flatnonzero(use)
    out.estimates.put(idx[pos], other.take(pos))
    out.h[idx[pos]] = h2[pos]
    out.values[idx[pos]] = second.values[pos]
    return out


def redo_undefined(setup: Setup, numeric: Numeric) -> Numeric:
    """Coordinates whose stencil met a non-finite value: shorter steps, then one side.

    Only these coordinates are redone; the others keep their values untouched.
    """
    if numeric.method == "complex-step":
        return numeric
    bad = np.flatnonzero(~np.isfinite(numeric.values).all(axis=1) & ~numeric.failed &
                         numeric.done)
    if bad.size == 0:
        return numeric
    numeric = numeric.copy()   # the coordinates redone below are changed in this copy
    first_values = numeric.values[bad].copy()
    first_h = numeric.h[bad].copy()    # where the non-finite values were met, for the text
    h = first_h.copy()
    todo = np.ones(bad.size, dtype=bool)
    shortest = SHORTEST_ULPS * setup.eps[numeric.coords[bad]] * \
        np.abs(np.nan_to_num(setup.base[numeric.coords[bad]]))
    for _ in range(SHORTEN_TIMES):
        k = np.flatnonzero(todo & (h / SHORTEN_BY >= shortest))
        if k.size == 0 or setup.runner.interrupted:
            break
        h[k] /= SHORTEN_BY
        again = one_pass(setup, numeric.method, numeric.coords[bad[k]], h[k])
        fine = np.isfinite(again.values).all(axis=1) & ~again.failed & again.done
        _adopt(numeric, bad[k[fine]], again, np.flatnonzero(fine))
        # The first finite step may still reach close to where the cost is undefined (its
        # derivatives grow fast there): one step shorter again is used, trusted to within
        # the distance between the two values scaled by the stencil's order.
        k_fine = k[fine & (h[k] / SHORTEN_BY >= shortest[k])]
        if k_fine.size:
            inner = one_pass(setup, numeric.method, numeric.coords[bad[k_fine]],
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
            where = _offsets_text(numeric.method, first_values[i], first_h[i])
            numeric.details[j] = f"the cost is not finite at {where}: step shortened to {h[i]:.3g}"
        todo[k[fine]] = False
    rest = bad[todo]
    if rest.size and not setup.runner.interrupted:
        _one_sided(setup, numeric, rest, first_values[todo])
    numeric.undefined = [int(numeric.coords[j]) for j in bad]
    return numeric


def _offsets_text(method: str, values, h: float) -> str:
    """'x-0.000488, x+0.000488': the stencil points at step h whose values are not finite."""
    offsets = np.array(stencils.OFFSETS[method]) * h
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
    extrapolated: 2 D(h/2) - D(h), trusted to twice |D(h/2) - D(h)| plus rounding (near
    a pole the neglected terms are of the same size: gammaln and psi near 0)."""
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
    noise = stencils.value_noise(v, stencils.Near(setup.f0, setup.eps_f, setup.line.noise))
    for k, j in enumerate(positions):
        points = _offsets_text(numeric.method, first_values[k], h[k])
        side = "forward" if sides[k] > 0 else "backward"
        ok = np.isfinite(v[k]).all() and not any(2 * k + r in run.failures for r in (0, 1))
        est = numeric.estimates
        if ok:
            est.derivative[j], est.truncation[j] = d[k], 2 * abs(near[k] - far[k])
            est.rounding[j], est.gap[j], est.curvature[j] = 10 * noise[k] / h[k], 0.0, 0.0
            numeric.details[j] = f"the cost is not finite at {points}: {side} differences used"
        else:
            est.derivative[j] = np.nan
            numeric.details[j] = (f"the cost is not finite near here (at {points}, and on "
                                  "both sides at every shorter step tried)")


def one_pass(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray) -> Numeric:
    """One stencil per coordinate; h is aligned with coords."""
    results = _run_stencils(setup, method, coords, h)
    k = len(stencils.OFFSETS[method])
    values = results.values.reshape(len(coords), k)
    failed = np.zeros(len(coords), dtype=bool)
    details = [""] * len(coords)
    for number, exc in sorted(results.failures.items()):
        c = number // k
        if not failed[c]:
            details[c] = describe_failure(exc)
        failed[c] = True
    done = ~np.isnan(values).any(axis=1) | failed
    if not results.interrupted:
        done[:] = True
    est = _estimates(setup, method, coords, h, values)
    return Numeric(coords, np.array(h, dtype=float), values, est, failed, details, done, method)


def _estimates(setup: Setup, method: str, coords, h, values) -> stencils.Estimates:
    """The stencils' estimates from the values of one stencil per coordinate."""
    s = setup.scale[coords]
    with np.errstate(all="ignore"):
        # One-sided stencils see no curvature of their own: the largest any line saw.
        bend = setup.line.largest_curvature_s2 if method in ("forward", "backward") \
            else setup.line.curvature_s2
        # The terms round at the dtype's epsilon unless the cost is noisy beyond it.
        terms = setup.eps_f if setup.noisy else float(np.finfo(setup.runner.output_dtype).eps)
        near = stencils.Near(setup.f0, setup.eps_f, setup.line.noise, bend / s ** 2,
                             8 * setup.line.third / s ** 3,
                             np.abs(np.nan_to_num(setup.base[coords])), terms)
        return stencils.combine(method, values, h, s, near)


def _run_stencils(setup: Setup, method: str, coords: np.ndarray, h: np.ndarray):
    """The cost at every stencil point of `coords`.  The requests (four parameter vectors
    of a full central sweep) end with this call, before the estimates are made."""
    full = np.zeros(setup.base.size)
    full[coords] = h
    where, amounts = plan.requests(method, coords, full)
    with warnings.catch_warnings():
        if method == "complex-step":  # a cast that drops the imaginary part is an error here
            warnings.simplefilter("error", np.exceptions.ComplexWarning)
        return setup.runner.run(where, amounts, label=f"{method} differences")


# In a cost of float32 precision or coarser (eps_f at least LOW_PRECISION, half float32's
# epsilon), the largest gradient entry counts in a row's terms only up to
# LOW_PRECISION_TERMS times the row's own sizes: its share of the analytic allowance (3e-5
# in float32) times an entry of 1e3 let a 5% error in an entry of 0.65 pass.  float64 keeps
# the largest entry (a correct erfcx derivative of record cancels that far).
LOW_PRECISION = stencils.LOW_PRECISION_EPS
LOW_PRECISION_TERMS = 10.0


def term_sizes(setup: Setup, numeric: Numeric, third: bool = False) -> np.ndarray:
    """Per coordinate, the size of the terms a gradient entry is summed from (see verdicts).

    third: count the cost's third derivative along the noise line too, where slope and
    curvature both vanish at the point (x^3 at 0): the size a value is negligible next
    to.  Not for step refinement, which a pole nearby (its large third derivative) would
    switch off."""
    est = numeric.estimates
    s = setup.scale[numeric.coords]
    slope = max(setup.line.slope, setup.line.third) if third else setup.line.slope
    bend = stencils.line_hint(numeric.method, setup.line.curvature_s2 / s ** 2, est, setup.f0, s)
    size = np.abs(np.nan_to_num(setup.base[numeric.coords]))
    curvature = est.curvature + bend
    seen = np.maximum(curvature * stencils.reach(est.derivative, curvature, s, size), slope / s)
    cap = LOW_PRECISION_TERMS if setup.eps_f >= LOW_PRECISION else np.inf
    return stencils.term_scale(est.derivative, setup.f0, s, seen, largest_cap=cap)


# measured_extrapolation: the step error of Richardson's value R(H) = (4 C(H/2) - C(H)) / 3
# measured from one more central difference, C(2H), instead of bounded by its gap to
# C(H/2).  With C(t) = f1 + a t^2 + b t^4, R(2H) - R(H) = 15 R(H)'s error (the next column
# of the extrapolation tableau).  Trusted only where the differences show that expansion:
# C(2H) - C(H) is 4 times C(H) - C(H/2) (within RATIO_SLACK) and the latter is
# RESOLVED_ABOVE times its rounding, or all three are equal within their rounding.  Then
# the error is MEASURED_SAFETY times the measured one plus its own rounding, never above
# the gap.
RATIO_SLACK = 0.25
RESOLVED_ABOVE = 8.0
MEASURED_SAFETY = 2.0
# A row whose value is still mostly rounding climbs: one more central difference at twice
# the longest step (two evaluations), and the triple one step up is measured, up to
# LONGEST_CLIMB times (a value from 32 times the default step at most, 18 evaluations a
# row in all, with C(h/4) and the Richardson pass).  The default steps are sized for
# the dtype's epsilon relative to |f|; a float32 cost near 0 summed from terms of size 1
# (a distillation loss near its optimum) rounds 1e3 times more than that, and there its
# rounding, not its curvature, limits the value: the best step was 16 times longer.
LONGEST_CLIMB = 5


def _triple_test(near, far, unit) -> tuple:
    """(measured, resolved, steady) of three central differences C(H/2), C(H), C(2H):
    near = C(H) - C(H/2), far = C(2H) - C(H), unit = the noise of one value over H."""
    with np.errstate(all="ignore"):
        steady = (np.abs(near) <= 2 * 3 * unit) & (np.abs(far) <= 2 * 1.5 * unit)
        resolved = np.abs(near) > RESOLVED_ABOVE * 3 * unit
        follows = resolved & (np.abs(far / near - 4) < 4 * RATIO_SLACK)
    return follows | steady, resolved, steady


def measured_extrapolation(setup: Setup, coords: np.ndarray, h: np.ndarray,
                           reference: stencils.Estimates) -> tuple:
    """Richardson values at `coords` (steps h aligned with them) whose truncation error is
    measured where the cost follows the expansion, at the step of smallest error on a
    ladder h, 2h, 4h, ... climbed while rounding dominates: (Numeric, measured) with
    measured the rows where it was.  A value is taken only within the error bounds of
    the best one so far, starting from `reference` (the rows' first estimates): three
    differences can look steady across a pole the first steps stayed clear of (gammaln
    at 3e-6, about even there)."""
    out = one_pass(setup, "richardson", coords, h)
    best = reference.take(np.arange(len(coords)))
    f = out.values.real.copy()      # out's values change as rungs are taken
    n = len(coords)
    measured = np.zeros(n, dtype=bool)
    climbing = ~out.failed & np.isfinite(out.estimates.derivative)
    # Central differences and their points' values per rung: rung k has step h 2^(k-2).
    # The lowest, C(h/4), checks the expansion once more below each triple: steps of 4
    # on float32 logits of 1000, whose softmax varies on a length of 1, gave three
    # differences in a ratio of 4 by chance.
    quarter = one_pass(setup, "central", coords, h / 4)
    ends = quarter.values.real
    plus, minus = [ends[:, 0], f[:, 2], f[:, 0]], [ends[:, 1], f[:, 3], f[:, 1]]
    climbing &= ~quarter.failed
    steps = [h / 4, h / 2, h]
    for _ in range(LONGEST_CLIMB + 1):
        rows = np.flatnonzero(climbing)
        if rows.size == 0 or setup.runner.interrupted:
            break
        top = 2 * steps[-1]
        wide = one_pass(setup, "central", coords[rows], top[rows])
        p, m = np.full(n, np.nan), np.full(n, np.nan)
        p[rows], m[rows] = wide.values.real[:, 0], wide.values.real[:, 1]
        p[rows[wide.failed]] = np.nan
        plus.append(p)
        minus.append(m)
        steps.append(top)
        # The triple C(H/2), C(H), C(2H) around H = the rung below the new one.
        H = steps[-2][rows]
        values = np.stack([plus[-2][rows], minus[-2][rows], plus[-3][rows], minus[-3][rows]], 1)
        rich = _richardson_from(setup, coords[rows], H, values)
        est = rich.estimates
        with np.errstate(all="ignore"):
            c1 = (values[:, 0] - values[:, 1]) / (2 * H)
            c_half = (values[:, 2] - values[:, 3]) / H
            c2 = (p[rows] - m[rows]) / (2 * top[rows])
            c_quarter = (plus[-4][rows] - minus[-4][rows]) / (H / 2)
            unit = est.noise / H
            ok, resolved, steady = _triple_test(c1 - c_half, c2 - c1, unit)
            # The difference below, C(H/2) - C(H/4), must be a quarter of the near one
            # (or within its rounding, for a steady row).
            below = c_half - c_quarter
            ok &= np.where(steady, np.abs(below) <= 2 * 6 * unit,
                           np.abs(below - (c1 - c_half) / 4) <=
                           RATIO_SLACK * np.abs(c1 - c_half) / 4 + 6 * unit)
            ok &= np.isfinite(c2) & np.isfinite(est.derivative) & ~rich.failed
            error = MEASURED_SAFETY * (np.abs((4 * c1 - c2) / 3 - est.derivative) / 15 +
                                       0.3 * unit)
        est.truncation = np.where(ok, np.minimum(error, est.gap), est.truncation)
        total = est.truncation + est.rounding
        before = best.take(rows)
        consistent = np.abs(est.derivative - before.derivative) <= before.error + total
        ok &= consistent
        take = ok & (~measured[rows] | (total < before.error))
        _adopt(out, rows[take], rich, np.flatnonzero(take))
        best.put(rows[take], rich.estimates.take(np.flatnonzero(take)))
        measured[rows[take]] = True
        # Up while rounding dominates: steady, measured with rounding above the step
        # error, or unresolved while the far difference could still be the expansion's
        # (at most 4 times the near one, with slack and rounding; one that jumps, a kink
        # between H and 2H, says the steps are long enough already).
        climbing[:] = False
        with np.errstate(all="ignore"):
            could_follow = np.abs(c2 - c1) <= 4 * (1 + RATIO_SLACK) * np.abs(c1 - c_half) + \
                2 * 3 * unit
        climbing[rows] = np.isfinite(c2) & consistent & (
            (~resolved & ~ok & could_follow) | steady | (ok & (est.rounding > est.truncation)))
    return out, measured


def _richardson_from(setup: Setup, coords, h, values) -> Numeric:
    """A Richardson Numeric from its four values (f(x+h), f(x-h), f(x+h/2), f(x-h/2))
    already computed: the estimates of one_pass, no evaluation."""
    est = _estimates(setup, "richardson", coords, h, values)
    return Numeric(coords, np.array(h, dtype=float), values, est,
                   ~np.isfinite(values).all(axis=1), [""] * len(coords),
                   np.ones(len(coords), dtype=bool), "richardson")


# --- each side of the point alone ---------------------------------------------------------
# A central stencil that crosses a kink near the point (a ReLU whose pre-activation is
# 1e-4 from 0, in float32 where the step is 4e-3) mixes two slopes, and no error model of
# a smooth cost covers that.  The cost is smooth on at least one side up to the nearest
# kink, so one-sided values tell: on each side v(s) = 2 D(s) - D(2s), second order, with
# D(t) = (f(x + t) - f(x)) / t (backward: (f(x) - f(x - t)) / t), and its error bounded
# by its distance to the same value one step up, v(2s), plus rounding.  Both sides have
# the same leading error (-f3 s^2 / 3), so on a smooth cost they agree within it; across
# a kink at d < 4s one side is off by a share of the jump in slope.  The ladder shrinks s
# SIDE_SHRINK-fold a rung, up to SIDE_RUNGS rungs, reusing the longer rung's values.
SIDE_SHRINK = 4
SIDE_RUNGS = 6
# D(t) at the steps 4 s0 2^-j, j = 0 .. SIDE_LEVELS - 1: rung k uses j = 2k, 2k + 1, 2k + 2.
SIDE_LEVELS = 2 * SIDE_RUNGS + 1
# Rounding of v(s) = (2 f(x + s) - f(x + 2s) / 2 - 3 f(x) / 2) / s per unit of one value's
# noise over s: the sum of the weights' sizes.
SIDE_ROUNDING = 4.0


@dataclass
class SideLadder:
    """One-sided slopes D(t) = +-(f(x +- t) - f(x)) / t of some rows at the steps
    4 s0 2^-j (columns j), filled as rungs need them (nan until then)."""
    coords: np.ndarray
    s0: np.ndarray
    plus: np.ndarray             # (rows, SIDE_LEVELS)
    minus: np.ndarray
    noise: np.ndarray            # (rows, SIDE_LEVELS): a bound on one value's noise
    failed: np.ndarray           # a point raised or was not finite


@dataclass
class SideRung:
    """The two one-sided values of some rows at one rung, and their error bounds."""
    plus: np.ndarray
    minus: np.ndarray
    plus_error: np.ndarray
    minus_error: np.ndarray
    step: np.ndarray
    curvature: np.ndarray        # |f2| from the more precise side's slopes
    rounding: np.ndarray
    noise: np.ndarray            # a bound on one value's noise at this rung's points


def side_ladder(coords: np.ndarray, s0: np.ndarray) -> SideLadder:
    n = len(coords)
    empty = np.full((n, SIDE_LEVELS), np.nan)
    return SideLadder(coords, s0, empty, empty.copy(), empty.copy(), np.zeros(n, dtype=bool))


def side_rung(setup: Setup, ladder: SideLadder, rows: np.ndarray, k: int) -> SideRung:
    """Rung k of the ladder at `rows` (positions in it): the slopes it lacks are measured
    (two evaluations per row and step), then each side's value and error bound."""
    near = stencils.Near(setup.f0, setup.eps_f, setup.line.noise)
    for j in (2 * k, 2 * k + 1, 2 * k + 2):
        todo = rows[np.isnan(ladder.plus[rows, j]) & ~ladder.failed[rows]]
        if todo.size == 0:
            continue
        t = 4.0 * ladder.s0[todo] / 2.0 ** j
        for method, slopes in (("forward", ladder.plus), ("backward", ladder.minus)):
            done = one_pass(setup, method, ladder.coords[todo], t)
            slopes[todo, j] = done.estimates.derivative
            bad = done.failed | ~np.isfinite(done.values.real).all(axis=1) | ~done.done
            ladder.failed[todo] |= bad
            ladder.noise[todo, j] = np.fmax(ladder.noise[todo, j],
                                            stencils.value_noise(done.values, near))
    s = 4.0 * ladder.s0[rows] / 2.0 ** (2 * k + 2)
    noise = np.nanmax(ladder.noise[rows][:, 2 * k:2 * k + 3], axis=1, initial=0.0)
    rounding = SIDE_ROUNDING * noise / s

    def side(d):
        near_v = 2 * d[rows, 2 * k + 2] - d[rows, 2 * k + 1]     # v(s)
        far_v = 2 * d[rows, 2 * k + 1] - d[rows, 2 * k]          # v(2s)
        return near_v, np.abs(near_v - far_v) + rounding
    plus, plus_error = side(ladder.plus)
    minus, minus_error = side(ladder.minus)
    best = np.where(plus_error <= minus_error, ladder.plus[rows].T, ladder.minus[rows].T).T
    curvature = 2 * np.abs(best[:, 2 * k + 2] - best[:, 2 * k + 1]) / s
    return SideRung(plus, minus, plus_error, minus_error, s, curvature, rounding, noise)
