"""Stage 5, verdicts: analytic against numeric, one coordinate at a time.

Default rule (no rtol / atol given).  A coordinate agrees when

    |analytic - numeric| <= 2 * error_estimate + share * (|analytic| + terms)

    share = r(eps) + 10 (eps_f - eps), at most r(eps_f)
    r(e) = min(1000 e, 1e-3, max(1e-5, 10 e)): 1000 eps for float64, 84 for float32,
    1e-3 (1 eps) for float16; eps the cost dtype's epsilon

error_estimate is the numeric derivative's own estimated error (truncation plus
rounding, from stencils.py).  The second part allows for rounding in the
analytic gradient itself, which is computed in floating point too and is
summed from terms that may be far larger than the result: near a minimiser
the gradient is zero but its terms are not.  `terms` estimates their size per
coordinate as the largest of: the largest numeric gradient entry, |f0| / scale,
|f2| * scale (the second derivative seen by the stencil, or a typical one
seen along the noise probe's line) and the cost's slope along that line.
eps_f is the relative precision of the cost's values (dtype epsilon, or
measured noise where that is larger).

With rtol and/or atol the rule is numpy's: agree when
|analytic - numeric| <= atol + rtol * |numeric|, a missing one counting as 0;
the error estimate is then only reported, not used.
"""
from __future__ import annotations

import numpy as np

VERDICTS = ("agree", "disagree", "kink", "noisy", "non-finite", "error")
FAILING = ("disagree", "non-finite", "error")   # verdicts that fail a report
SAFETY = 2.0
ANALYTIC_ROUNDING = 1000.0
# ... but no more than ANALYTIC_ROUNDING_SHARE (or ANALYTIC_ROUNDING_LOW eps where that is
# larger), and never above ANALYTIC_ROUNDING_CAP: a float64 formula may cancel 1000-fold
# and still be right (2 x erfcx(x) - 2 / sqrt(pi) at x = 20), while 1000 float32
# epsilons, 1.2e-4, would hide a 0.1% error in a float32 loss; in float16 the numeric
# error estimates decide.
ANALYTIC_ROUNDING_SHARE = 1e-5
ANALYTIC_ROUNDING_LOW = 10.0
ANALYTIC_ROUNDING_CAP = 1e-3
ANALYTIC_VALUE_ROUNDING = 16.0
ANALYTIC_NOISE = 10.0


def allowed_difference(analytic, numeric, error, *, terms, eps_f, rtol=None, atol=None,
                       eps_a=None, eps_dtype=None, cost_terms=None):
    """How far apart analytic and numeric may be, per coordinate (see module text).

    eps_a is the precision of the analytic values themselves (a float32 gradient of a
    float64 cost carries float32 rounding).  eps_dtype: the epsilon of the cost's dtype,
    where eps_f is a measured noise above it (None: eps_f is the dtype's).  cost_terms:
    |f0| / scale per coordinate, what eps_f is relative to (None: the terms).
    """
    if rtol is None and atol is None:
        eps_d = eps_f if eps_dtype is None else min(eps_dtype, eps_f)
        # A cost whose values are noisier than its dtype (a factorisation, an inner
        # solve) may hand over a gradient as noisy: ANALYTIC_NOISE times that noise on
        # top of the dtype's share, not the cancellation factor again (that gave a GP
        # likelihood's log-noise entry, 1e-12 noisy, an allowance that passed a 0.1%
        # error); never more than the share of eps_f itself.  The noise is relative to
        # |f0|, and counts relative to the terms as the noise of f0 / scale: a float32
        # cost near 0 summed from terms of size 1 is noisy next to |f0| only.
        excess = eps_f - eps_d
        if cost_terms is not None:
            with np.errstate(all="ignore"):
                excess = excess * np.where(terms > cost_terms, cost_terms / terms, 1.0)
        share = np.minimum(_rounding_share(eps_d) + ANALYTIC_NOISE * excess,
                           _rounding_share(eps_f))
        if eps_a is not None and eps_a > eps_f:
            # Values stored in a lower precision than the cost's carry its rounding on top:
            # about eps_a relative to what they are summed from, no more, so that a 0.1%
            # error in a float32 gradient is still caught.
            share += ANALYTIC_VALUE_ROUNDING * eps_a
        return SAFETY * error + share * (np.abs(analytic) + terms)
    return (atol or 0.0) + (rtol or 0.0) * np.abs(numeric)


def _rounding_share(eps):
    return min(ANALYTIC_ROUNDING * eps, ANALYTIC_ROUNDING_CAP,
               max(ANALYTIC_ROUNDING_SHARE, ANALYTIC_ROUNDING_LOW * eps))


def relative_error(analytic, numeric):
    """|a - n| / max(|a|, |n|); 0 where both are 0, inf where either is not finite."""
    diff = np.abs(analytic - numeric)
    size = np.maximum(np.abs(analytic), np.abs(numeric))
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.where(size > 0, diff / np.where(size > 0, size, 1.0), 0.0)
    return np.where(np.isfinite(analytic) & np.isfinite(numeric), rel, np.inf)


def decide(analytic, numeric, allowed, failed) -> np.ndarray:
    """Verdict per coordinate: agree / disagree / non-finite / error."""
    finite = np.isfinite(analytic) & np.isfinite(numeric)
    with np.errstate(invalid="ignore"):
        close = np.abs(analytic - numeric) <= allowed
    # One str object for every row (an object array of n pointers): np.where(...).astype,
    # and np.full too (numpy 2 casts the str to a unicode array first), would box a new
    # string per row, 7 parameter vectors at n = 1e5.
    verdict = np.empty(close.shape, dtype=object)
    verdict.fill("disagree")
    verdict[close] = "agree"
    verdict[~finite] = "non-finite"
    verdict[failed] = "error"
    return verdict


def _round_up_decade(value: float) -> float:
    return float(10.0 ** np.ceil(np.log10(value)))


def suggest_tolerances(analytic, numeric, verdict, margin=10.0) -> tuple:
    """(rtol, atol) that every agreeing coordinate passes with `margin` to spare.

    Coordinates are split by size: those with |numeric| above 1e-6 of the
    largest set rtol, as margin times their largest relative error; the small
    ones set atol, as margin times their largest absolute error.  Both are
    rounded up to a power of ten.  With numpy's rule
    |a - n| <= atol + rtol * |n| each agreeing coordinate then passes.
    """
    ok = verdict == "agree"
    if not np.any(ok):
        return None, None
    a, n = analytic[ok], numeric[ok]
    diff = np.abs(a - n)
    big = np.abs(n) > 1e-6 * np.max(np.abs(n))
    rel = diff[big] / np.abs(n[big]) if np.any(big) else np.zeros(1)
    rtol = _round_up_decade(max(margin * float(np.max(rel)), 1e-15))
    small = diff[~big]
    atol = _round_up_decade(margin * float(np.max(small))) if small.size and np.max(small) > 0 \
        else 0.0
    return rtol, atol


def apply_kinks(verdict, analytic, kinks, allowed, details) -> np.ndarray:
    """Where a kink lies in the stencil: 'kink' if the analytic value lies between the
    two one-sided slopes (a valid one-sided or sub-gradient), else 'disagree'."""
    verdict = verdict.copy()
    for j in np.flatnonzero(kinks.found):
        if verdict[j] in ("error", "non-finite"):
            continue
        low, high = kinks.low[j], kinks.high[j]
        margin = allowed[j] + kinks.slack[j]
        inside = low - margin <= analytic[j] <= high + margin
        verdict[j] = "kink" if inside else "disagree"
        where = "between" if inside else "outside"
        details[j] = f"kink: analytic {where} the one-sided slopes {low:.6g} and {high:.6g}"
    return verdict


# A row whose allowance comes from the numeric error estimate and reaches this share of
# the values decides nothing: 'agree' there would pass a relative error near 1.
UNDECIDED_SHARE = 0.5
# ... unless both values are this small next to the terms the entry is summed from.
NEGLIGIBLE = 1e-3
# A numeric value whose error estimate is at most this share of it is known well enough
# that an analytic value half of it off (or more) disagrees, whatever the terms' size.
RESOLVED_SHARE = 0.25


def mark_undecided(verdict, analytic, est, terms, details, noisy, noise_level) -> np.ndarray:
    """'noisy' (undecided) where an agreeing row's numeric derivative is too uncertain
    to mean anything: its error estimate is at least half the values, and either the
    cost is noisy and noise dominates the estimate, or the two values differ by half
    their size or more (a quantized cost, a step far too long).  Values that are both
    tiny next to the terms they are summed from (a gradient entry near zero at a
    minimiser: below NEGLIGIBLE of their terms) agree and stay, unless the numeric value
    is known to within a quarter of itself: then a relative error of a half or more is
    no rounding of the analytic value, and the row disagrees (a zero gradient entry
    where the cost has a clear slope, next to entries a million times larger)."""
    verdict = verdict.copy()
    n = est.derivative
    size = np.maximum(np.abs(analytic), np.abs(n))
    apart = relative_error(analytic, n) >= UNDECIDED_SHARE
    known = (est.error <= RESOLVED_SHARE * np.abs(n)) & (n != 0)
    wrong = (verdict == "agree") & apart & known
    far = apart & ~(size <= NEGLIGIBLE * terms)
    swamped = (est.error >= UNDECIDED_SHARE * size) & (est.rounding >= est.truncation) & noisy
    undecided = (verdict == "agree") & (far | swamped) & ~wrong
    for j in np.flatnonzero(wrong):
        verdict[j] = "disagree"
        details[j] = (f"the numeric value is known to within {est.error[j]:.2g}: the analytic "
                      "value is off by half of it or more")
    for j in np.flatnonzero(undecided):
        verdict[j] = "noisy"
        details[j] = (f"noise {noise_level:.2g} swamps this derivative" if swamped[j] else
                      f"undecided: the numeric value is known only to within {est.error[j]:.2g}")
    return verdict


# An agreement whose estimated step error is above this share of the value is rough.
ROUGH_SHARE = 0.1


def rough_agreement(verdict, est) -> np.ndarray:
    """Agreeing rows whose error estimate is mostly step error (not rounding or noise)
    and at least ROUGH_SHARE of the numeric value: the stencil spans a length on which
    the cost changes character (a kink, a steep bend), so its agreement says little."""
    return (verdict == "agree") & (est.truncation > est.rounding) & \
        (est.truncation > ROUGH_SHARE * np.abs(est.derivative))


def mark_flat(verdict, values, f0, details) -> np.ndarray:
    """'noisy' (undecided) where a quantized cost returned exactly f(x) at every point of
    a row's stencil: the difference is zero whatever the gradient, so it decides nothing
    (a step long enough to cross the cost's jumps, step=, can)."""
    verdict = verdict.copy()
    # All of each value, imaginary part too: a complex step's real parts are f(x) anyway.
    flat = np.all(values == f0, axis=1) & np.isin(verdict, ("agree", "disagree"))
    for j in np.flatnonzero(flat):
        verdict[j] = "noisy"
        details[j] = ("the cost is constant over this stencil (piecewise constant at this "
                      "scale): undecided; a step long enough to cross its jumps (step=) "
                      "can decide")
    return verdict


# --- wording shared by the notes and the hints (gradcheck_kit/hints.py) ---------------
def count(n: int, noun: str) -> str:
    """'1 coordinate', '3 coordinates'."""
    return f"{n} {noun}" + ("" if n == 1 else "s")


def name_list(names, limit=4) -> str:
    """'a, b, c, d and 3 more': the names of coordinates in one sentence."""
    names = list(names)
    shown = ", ".join(names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")
