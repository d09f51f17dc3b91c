"""Stage 4, stencils: cost values -> derivative estimates with error estimates.

Each method is a set of offsets (multiples of the step h along one coordinate
or direction) and a rule that combines the cost values there into a derivative
estimate, a truncation-error estimate and a rounding-error estimate.

Steps (Nocedal & Wright, Numerical Optimization, 2nd ed., section 8.1): a
stencil whose truncation error is O(h^p) balances it against rounding
eps*|f|/h at h ~ eps^(1/(p+1)) * scale, with scale = max(|x_i|, 1).  Steps are
rounded to a power of two so that x + h, x - h, x + 2h and x + h/2 are exact
for all but the rarest x.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .plan import (COMPLEX_STEP, METHODS, OFFSETS, STEP_POWER,  # noqa: F401 - the method table
                   default_steps, power_of_two, scale_of, zeros)

# Order p of each stencil's truncation error, O(h^p).
ORDER = {"forward": 1, "backward": 1, "central": 2, "five-point": 4, "richardson": 4,
         "complex-step": 2}


@dataclass
class Estimates:
    derivative: np.ndarray   # one per coordinate / direction
    truncation: np.ndarray   # estimated truncation error
    rounding: np.ndarray     # estimated rounding error (from eps_f * |f| / h)
    curvature: np.ndarray    # |f2| (second derivative) from the symmetric points; else 0
    gap: np.ndarray = None   # distance to the embedded lower-order value (five-point, richardson)
    noise: np.ndarray = None  # absolute noise of one cost value at this coordinate's points

    FIELDS = ("derivative", "truncation", "rounding", "curvature", "gap", "noise")

    @property
    def error(self) -> np.ndarray:
        return self.truncation + self.rounding

    def take(self, idx) -> "Estimates":
        """The estimates of the coordinates at positions idx."""
        return Estimates(*(getattr(self, f)[idx] for f in self.FIELDS))

    def put(self, idx, other: "Estimates") -> None:
        """Overwrite positions idx with `other` (aligned with idx)."""
        for f in self.FIELDS:
            getattr(self, f)[idx] = getattr(other, f)


@dataclass(frozen=True)
class Near:
    """What is known about the cost near the point; every stencil's error model reads it.

    f0: the cost at the point.  eps_f: the relative accuracy of its values (machine
    epsilon of its dtype, or its measured noise over |f0|, whichever is larger).
    noise: the measured absolute noise of one value (see noise_from_values).
    curvature, third: a typical |f2| and |f3| (scalars or per coordinate), for stencils
    that see none themselves.
    """
    f0: float
    eps_f: float
    noise: float = 0.0
    curvature: object = 0.0
    third: object = 0.0
    size: object = None      # |x| per row, for reach(); None: the scale
    # The relative rounding of the terms a derivative is summed from; None: eps_f.  A
    # measured noise above the dtype's rounding is already the terms' rounding as the
    # values show it (a float32 cost near 0 summed from terms of size 1); relative to
    # |f0| it is no measure of the terms' own precision.
    eps_terms: object = None


def value_noise(values: np.ndarray, near: Near) -> np.ndarray:
    """Per row of values: a bound on the noise of one value, the larger of its rounding
    (eps_f times the largest value) and the measured level.  The measured level is a
    standard deviation; a bound that holds for nearly every value is a few of them."""
    fmax = np.max(np.abs(values.real), axis=1, initial=abs(near.f0)) if values.size \
        else np.zeros(len(values))
    return np.maximum(near.eps_f * fmax, NOISE_BOUND * near.noise)


def combine(method: str, values: np.ndarray, h: np.ndarray, scale: np.ndarray,
            near: Near) -> Estimates:
    """Derivative estimates from `values` of shape (n, len(OFFSETS[method])), taken at
    steps h (one per row) from a point whose cost is described by `near`.  Below, f1, f2,
    f3, f5 name the first, second, third and fifth derivatives."""
    f = values
    f0, eps_f, curvature_hint = near.f0, near.eps_f, near.curvature
    noise = value_noise(f, near)
    est = _estimate(method, f, h, scale, noise, near)
    if est.gap is None:     # no embedded lower-order value: zeros of no memory (read-only)
        est.gap = zeros(len(h))
    # Rounding in the terms a derivative is made of: where the cost is near 0 (a zero
    # residual) its values round far below its terms, which are about |f1| + |f0| / scale
    # + |f2| * scale; no stencil can be more exact than eps_f times those.
    curvature = np.maximum(est.curvature, line_hint(method, curvature_hint, est, f0, scale))
    size = scale if near.size is None else near.size
    eps_terms = eps_f if near.eps_terms is None else near.eps_terms
    est.rounding = np.maximum(est.rounding, TERM_ROUNDING * (eps_f * abs(f0) / scale + eps_terms * (
        np.abs(est.derivative) + curvature * reach(est.derivative, curvature, scale, size))))
    est.noise = noise
    return est


# Stencils that measure a coordinate's own curvature take the noise line's typical one
# (a direction through all coordinates) as at most LINE_HINT_CAP times the largest of
# its own curvature, |f1| / scale and |f0| / scale^2: one coordinate whose cost varies
# on a length of 1e-7 (gammaln near its pole) curves the whole line, and would
# otherwise loosen every other coordinate's error estimate and allowance with it.
LINE_HINT_CAP = 1e4
MEASURES_CURVATURE = ("central", "five-point", "richardson")


def line_hint(method: str, hint, est: "Estimates", f0: float, scale):
    """The line's typical |f2| as the stencil may use it for each row (LINE_HINT_CAP)."""
    if method not in MEASURES_CURVATURE:
        return hint
    own = np.maximum(np.maximum(est.curvature, np.abs(est.derivative) / scale),
                     abs(f0) / scale ** 2)
    return np.minimum(hint, LINE_HINT_CAP * own)


# The measured noise level is a standard deviation s.  A central difference's rounding,
# (e+ - e-) / 2h, has standard deviation s / (sqrt(2) h) for independent errors; its
# bound NOISE_BOUND * s / h covers 99.9% of them (two-sided normal quantile 3.29, times
# 1 / sqrt(2): 2.33) where noise dominates.  2 covered 99.80% of the calibration corpus
# with central differences, 2.5 covers 99.85%; 3 loses a 20% bug in a float16 cost.
NOISE_BOUND = 2.5
# Safety factors over the textbook truncation terms whose derivative (|f2| for one-sided,
# |f3| for central differences) comes from a model rather than from the stencil's own
# values, set by the calibration corpus (tests/calibration.py, 4062 coordinates) to cover
# 99.9% of its coordinates: one-sided 8 covered 99.66%, 16 99.68%, 24 99.78%, 32 99.93%
# (a bump of length 1e-3 and gammaln near its pole, whose |f2| is far above any model's);
# central 2 covered 99.85%, 3 99.90%, 4 99.95% (J0 near an inflection of its slope, a
# tanh network).  The misses' ratios are spread, so doubling does not halve them.
ONE_SIDED_SAFETY = 32.0
CENTRAL_SAFETY = 4.0
# The fourth-order stencils are used at steps short enough (after refinement) that
# rounding decides their error; a cost summed from many terms (sum(exp(30 x)) over 1000
# entries) rounds each value several times eps * |f|, which the bound of one eps * |f|
# per value misses: measured on the calibration corpus (tests/calibration.py).
SUM_ROUNDING = 1.0
TERM_ROUNDING = 8.0


def _estimate(method, f, h, scale, noise, near: Near) -> Estimates:
    est = _estimate_by_method(method, f, h, scale, noise, near)
    f0 = near.f0
    if method in ("central", "five-point", "richardson"):
        # An odd cost (x |x| at 0) cancels the symmetric second difference to zero, so
        # the curvature kept for the term scale (term_scale) would vanish; where
        # it is that small, the larger one-sided curvature 2 |f(x +- h) - f(x) -+ h d| / h^2
        # (|f2| for a smooth cost) stands in.
        d = est.derivative
        plus = np.abs(f[:, 0].real - f0 - h * d)
        minus = np.abs(f[:, 1].real - f0 + h * d)
        one_sided = 2 * np.maximum(plus, minus) / h ** 2
        est.curvature = np.where(est.curvature < 0.01 * one_sided, one_sided, est.curvature)
    return est


def _estimate_by_method(method, f, h, scale, noise, near: Near) -> Estimates:
    f0, eps_f, curvature_hint, third_hint = near.f0, near.eps_f, near.curvature, near.third
    zero = np.zeros(len(h))
    if method == "complex-step":
        d = f[:, 0].imag / h
        # Truncation h^2 |f3| / 6, with |f3| from the model |f1| / scale^2 or the hint.
        f3 = np.maximum(np.abs(d) / scale ** 2, third_hint)
        # Rounding: the imaginary part is a sum of terms of about |f1| and |f0| / scale,
        # and no finer than the smallest subnormal (x h underflows where x is tiny).
        finest = np.finfo(f.real.dtype).smallest_subnormal if f.dtype.kind in "fc" else 0.0
        rounding = 4 * eps_f * (np.abs(d) + abs(f0) / scale) + finest / h
        return Estimates(d, h ** 2 * f3 / 6, rounding, zero)
    if method in ("forward", "backward"):
        sign = 1.0 if method == "forward" else -1.0
        d = sign * (f[:, 0] - f0) / h
        # Truncation h |f2| / 2 with the model |f2| ~ max(|f1| / scale, typical |f2|).
        # The model is rough (a typical |f2| may be far below this coordinate's), so the
        # bound is ONE_SIDED_SAFETY times the textbook h |f2| / 2.
        # The next term, h^2 |f3| / 6 with the line's third derivative, matters where
        # |f2| vanishes (x^3 at 0: the whole value is that term).
        f2 = np.maximum(np.abs(d) / scale, curvature_hint)
        trunc = ONE_SIDED_SAFETY * (h * f2 / 2 + h ** 2 * third_hint / 6)
        return Estimates(d, trunc, 2 * noise / h, zero)
    central = (f[:, 0] - f[:, 1]) / (2 * h)
    second = np.abs(f[:, 0] - 2 * f0 + f[:, 1]) / h ** 2
    if method == "central":
        # Truncation h^2 |f3| / 6.  Model: the cost varies on a length L, so |f3| ~ |f2| / L,
        # with L the larger of |f1| / |f2| (exact for exponentials) capped below at 64 h,
        # and the coordinate's scale; never below the third derivative seen on the line.
        # 2 |f2| / L: exact for a logarithm (-log x: f3 = 2 f2^2 / f1), twice an exponential.
        length = np.clip(np.abs(central) / np.maximum(second, 1e-300), h, scale)
        modelled = 2 * second / length + np.abs(central) / scale ** 2
        # The line's third derivative only up to LINE_HINT_CAP of this row's own sizes.
        third_hint = np.minimum(third_hint, LINE_HINT_CAP * (modelled + abs(f0) / scale ** 3))
        f3 = np.maximum(modelled, third_hint)
        trunc = CENTRAL_SAFETY * h ** 2 / 6 * f3
        return Estimates(central, trunc, noise / h, second)
    if method == "five-point":
        d = (8 * (f[:, 0] - f[:, 1]) - (f[:, 2] - f[:, 3])) / (12 * h)
        # The stencil is one Richardson step on C(h) and C(2h); its error is bounded,
        # conservatively as in Ridders (1982), by its distance from C(h).
        gap = np.abs(d - central)
        return Estimates(d, gap, SUM_ROUNDING * 1.5 * noise / h, second, gap.copy())  # two arrays
    if method == "richardson":
        half = (f[:, 2] - f[:, 3]) / h          # central difference at h/2
        d = (4 * half - central) / 3            # eliminates the h^2 term
        # Conservative error estimate after Ridders (1982): the extrapolated value
        # is trusted to within its distance from the best plain difference.
        gap = np.abs(d - half)
        return Estimates(d, gap, SUM_ROUNDING * 3 * noise / h, second, gap.copy())
    raise ValueError(f"unknown method {method!r}")


REFINABLE = ("five-point", "richardson")   # methods with an embedded lower-order value
# Their rounding bound per unit of noise / h: the sums of the weights' sizes.
VALUE_ROUNDING = {"five-point": 1.5, "richardson": 3.0}


def refined_steps(est: Estimates, h: np.ndarray, method: str) -> np.ndarray:
    """Shorter steps for coordinates whose lower-order gap dominates their rounding.

    Where the fourth-order error model holds (its error T below the gap G, see
    extrapolation_error), the step that minimises T (h'/h)^4 + U h/h' with rounding U:
    h (U / 4T)^(1/5).  Elsewhere the step was too long for the expansion to hold, and
    the step that balances the gap G ~ |f3| h^2 against U is taken: h (U / G)^(1/3).
    Never below h / 1024.
    """
    t4 = extrapolation_error(est, h, method) - est.rounding
    with np.errstate(divide="ignore", invalid="ignore"):
        fifth = (est.rounding / (4 * t4)) ** 0.2
        third = np.cbrt(est.rounding / np.maximum(est.gap, 1e-300))
    ratio = np.where((t4 < est.gap) & (t4 > 0), fifth, third)
    return power_of_two(h * np.clip(np.nan_to_num(ratio, nan=1.0), 1 / 1024, 1.0))


# The fourth-order values' h^4 error from their gap G to the embedded second-order
# value (G ~ h^2 |f3| / 6 for five-point, h^2 |f3| / 24 for Richardson's C(h/2)), under
# the model that the cost varies on one length along the coordinate, f_k ~ A / L^k:
# |f5| ~ |f3|^2 / |f1| (exact for exponentials and sines) or, where f1 is near 0,
# |f5| ~ |f3|^3 / |f2|^2.  Five-point's error is h^4 |f5| / 30, Richardson's h^4 |f5| / 480:
# both give 1.2 G^2 / |f1|, and 7.2 resp. 28.8 G^3 / (h^2 |f2|^2).  EXTRAPOLATION_SAFETY
# over these: the model is rough (a sum of terms of several lengths).
EXTRAPOLATION_SAFETY = 8.0
FIFTH_FROM_CURVATURE = {"five-point": 7.2, "richardson": 28.8}


def extrapolation_error(est: Estimates, h: np.ndarray, method: str) -> np.ndarray:
    """Modelled error of a fourth-order value (see above), never above its gap, plus rounding."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        by_slope = 1.2 * est.gap ** 2 / np.abs(est.derivative)
        by_curvature = FIFTH_FROM_CURVATURE[method] * est.gap ** 3 / (h * est.curvature) ** 2
        modelled = EXTRAPOLATION_SAFETY * np.fmin(by_slope, by_curvature)
    modelled = np.where(np.isfinite(modelled), np.minimum(modelled, est.gap), est.gap)
    return modelled + est.rounding


def pick_refined(first: Estimates, h_first, second: Estimates, h_second,
                 method: str) -> np.ndarray:
    """For each refined coordinate: is the second value's modelled error the smaller?"""
    return extrapolation_error(second, h_second, method) < \
        extrapolation_error(first, h_first, method)


def reach(derivative, curvature, scale, size) -> np.ndarray:
    """The length over which a gradient entry's terms are |f2| times it: the scale,
    max(|x|, 1), or, where both |x| and the length the cost varies on, |f1| / |f2|, are
    shorter, the larger of those two (ndtri at 1e-10 varies on 1e-10: |f2| * 1 would
    make terms 1e10 times the derivative).  A vanishing slope (a minimiser) keeps the
    scale."""
    with np.errstate(divide="ignore", invalid="ignore"):
        length = np.abs(derivative) / curvature
    return np.fmin(scale, np.fmax(size, length))


def term_scale(numeric, f0, scale, curvature_times_scale, largest_cap=np.inf) -> np.ndarray:
    """Size of the terms each gradient entry is summed from (see verdicts' module text):
    the largest numeric entry, |f0| / scale, and |f2| * scale, per coordinate.  The
    largest entry counts only up to largest_cap times the row's own sizes (its own
    entry, |f0| / scale and |f2| * scale)."""
    largest = float(np.max(np.abs(numeric[np.isfinite(numeric)]), initial=0.0))
    sizes = np.maximum(abs(f0) / scale, curvature_times_scale)
    if largest_cap == np.inf:
        return np.maximum(largest, sizes)
    own = np.maximum(np.abs(numeric), sizes)
    return np.maximum(own, np.minimum(largest, largest_cap * own))


SLOPES_DIFFER = "the complex step disagrees with real differences along a random direction"


def slopes_gap(complex_values, real_values, hc: float, t: float) -> float:
    """|complex slope - extrapolated real slope| relative to the larger, of one probe (the
    values of complex_probe_agrees)."""
    dc = complex(complex_values[0]).imag / hc
    fp, fm, fp2, fm2 = (float(np.real(v)) for v in real_values)
    slope = (4 * (fp - fm) / (2 * t) - (fp2 - fm2) / (4 * t)) / 3
    return abs(dc - slope) / max(abs(dc), abs(slope), 1e-300)


def complex_probe_agrees(complex_values, real_values, f0: float, hc: float, t: float,
                         eps_f: float, noise: float = 0.0) -> tuple:
    """Is the cost complex-safe?  (safe, reason) from one probe along a direction v.

    complex_values holds f(x + i hc v) and f(x + i t v); real_values f at x + t v,
    x - t v, x + 2t v, x - 2t v.  Three tests, each with the error of the real
    differences it compares against (from the two steps t and 2t):
    - Im f(x + i hc v) / hc, the complex-step slope, equals the extrapolated central
      slope (4 C(t) - C(2t)) / 3 (a cost that drops the imaginary part fails);
    - Re f(x + i t v) equals f(x) - t^2 f2 / 2, with f2 the second difference (abs()
      and conj() keep the slope of an analytic continuation but not its curvature);
    - Re f(x + i hc v) equals f(x).
    Rounding is the larger of eps_f * |f| and the measured noise of one value (a
    sum of large terms rounds far above eps_f * |f|).  A probe whose real differences
    are all within rounding cannot tell: unsafe.
    """
    fc, fct = (complex(z) for z in complex_values)
    fp, fm, fp2, fm2 = (float(np.real(v)) for v in real_values)
    if not all(np.isfinite(z.real) and np.isfinite(z.imag) for z in (fc, fct)):
        return False, "the cost is not finite at a complex point"
    size = max(abs(f0), abs(fp), abs(fm), abs(fp2), abs(fm2))
    rounding = 10 * max(eps_f * size, noise)
    if abs(fc.real - f0) > rounding + 1e-300:
        return False, "the real part of the cost changes at a complex point"
    dc, c1, c2 = fc.imag / hc, (fp - fm) / (2 * t), (fp2 - fm2) / (4 * t)
    slope = (4 * c1 - c2) / 3
    # For a smooth cost the extrapolated slope is off by O(t^4), far below |C(2t) - C(t)|
    # (about t^2 |f3| / 2); a quarter of that still fails a cost whose real slope is not
    # even converging like t^2 (x |x| at 0, where C(t) is linear in t).
    slope_tol = 0.25 * abs(c2 - c1) + rounding / t + 1e-12 * max(abs(dc), abs(slope))
    if abs(dc - slope) > slope_tol:
        return False, (f"{SLOPES_DIFFER} ({dc:.10g} vs {slope:.10g}): the cost is not "
                       "complex-safe")
    s1, s2 = (fp - 2 * f0 + fm) / t ** 2, (fp2 - 2 * f0 + fm2) / (4 * t ** 2)
    predicted = f0 - t ** 2 * (4 * s1 - s2) / 6       # f0 - t^2 f2 / 2, f2 extrapolated
    curve_tol = t ** 2 * abs(s2 - s1) + 2 * rounding
    if abs(fct.real - predicted) > curve_tol:
        return False, ("the real part of the cost at a complex point does not curve like the "
                       "cost itself (it takes abs(), a conjugate or a branch on the imaginary "
                       "part): the cost is not complex-safe")
    if abs(slope) * t <= 100 * rounding and t ** 2 * abs(s1) <= 100 * rounding:
        return False, ("the probe could not tell (the cost hardly changes along its direction), "
                       "so the complex step is not trusted")
    return True, ""


# Changes of a value below this many epsilons of the values' size are rounding: float64's
# epsilons; a lower precision's own (eps at least LOW_PRECISION_EPS) count
# LOW_PRECISION_CHANGE each, so that a float32 cost near 1 whose values jitter by an ulp
# or two along a line (1.2e-7 each, above 1e3 float64 epsilons) is not read as rounded
# to a grid, while a grid step of 64 float32 ulps (8e-6 relative) still is.
ROUNDING_CHANGE = 1e3
LOW_PRECISION_EPS = 6e-8
LOW_PRECISION_CHANGE = 64.0


def rounding_change(eps: float = None) -> float:
    """The largest change relative to the values' size that is rounding, for values of
    a dtype with epsilon eps (None: float64)."""
    if eps is not None and eps >= LOW_PRECISION_EPS:
        return LOW_PRECISION_CHANGE * eps
    return ROUNDING_CHANGE * float(np.finfo(float).eps)


def steps_seen(values, eps: float = None):
    """What equally spaced values say about a piecewise-constant cost: True where they
    look quantized (see looks_quantized); False where they cannot be, because some
    change is of rounding size (the values are not rounded to a coarse grid) or every
    step changes them (smooth at this spacing); None where they do not tell (no change,
    or a plateau next to sloped pieces)."""
    f = np.asarray(values, dtype=float)
    d = np.diff(f)
    moved = d != 0
    if not moved.any():
        return None
    if looks_quantized(f, eps):
        return True
    small = np.abs(d) <= rounding_change(eps) * float(np.max(np.abs(f)))
    if np.any(moved & small) or moved.all():
        return False
    return None


def looks_quantized(values, eps: float = None) -> bool:
    """Equally spaced values that repeat exactly and jump in between: a rounded or
    integer-valued output (piecewise constant).  Either each jump stands alone between
    repeats, or the values climb (or fall) in a staircase whose treads, two or more,
    lie between jumps of one direction.  A plateau next to a sloped piece (a hinge), or
    one plateau between two (a dead zone), is not: there the changes come in runs."""
    f = np.asarray(values, dtype=float)
    steps = _differences(f.tolist(), 1)   # the usual answer, without numpy's per-call cost
    if 0.0 not in steps or not any(steps):
        return False          # no repeat, or nothing but repeats
    d = np.array(steps)
    zero = d == 0
    big = np.abs(d) > rounding_change(eps) * float(np.max(np.abs(f)))
    moved = np.flatnonzero(~zero)
    if not big[moved].all():
        return False
    alone = all((k == 0 or zero[k - 1]) and (k == len(d) - 1 or zero[k + 1]) for k in moved)
    if alone and zero.sum() >= 3:
        return True
    # Treads strictly inside the climb: runs of repeats with jumps on both sides.
    inner = zero[moved[0]:moved[-1]]
    treads = int(np.sum(inner[1:] & ~inner[:-1])) + int(inner[0]) if inner.size else 0
    one_way = bool(np.all(d[moved] > 0) or np.all(d[moved] < 0))
    return one_way and treads >= 2




# Noise: the difference-table method of More & Wild, "Estimating computational noise",
# SIAM J. Sci. Comput. 33(3), 2011, written here from the paper's idea.  Along a line
# with spacing t the k-th differences of a smooth function shrink like t^k, while
# those of noise of size s keep a spread of about s * sqrt((2k)! / (k!)^2).
NOISE_POINTS = 9          # f at x + j t v for j = -4..4 (the centre is f0)
NOISE_SPACING = 2.0 ** -20  # t (about 1e-6) relative to the coordinate scales, in float64


def noise_spacing(eps: float) -> float:
    """The line's spacing for values of precision eps: smooth third differences, about
    t^3 |f3|, must stay below the noise, so t grows like eps^(1/3) (2^-11 for float32)."""
    return float(NOISE_SPACING * power_of_two((eps / np.finfo(np.float64).eps) ** (1 / 3)))


@dataclass
class LineFeatures:
    """What the noise line shows besides noise, for stencils that see little themselves."""
    noise: float           # absolute noise of one value
    order: int             # difference order the noise came from
    curvature_s2: float    # typical |f2| * scale^2
    slope: float           # largest |f - f0| / distance
    third: float           # largest |third difference| / t^3
    values: np.ndarray
    spacing: float = NOISE_SPACING
    largest_curvature_s2: float = 0.0   # the largest typical |f2| * scale^2 of all lines
    settled: bool = True   # the difference table reached a consistent order (or vanished)
    # A spike in the second differences was left out, and the slopes on both sides of
    # it are the same: one value off the line.  A pole between two points looks so, and
    # so does a float32 sum's rounding that steps at one point; the line cannot tell.
    lone_value: bool = False

    @staticmethod
    def none() -> "LineFeatures":
        return LineFeatures(0.0, 0, 0.0, 0.0, 0.0, np.zeros(0))


def line_features(values, t: float, spread: float) -> LineFeatures:
    """Noise, typical curvature, slope and third derivative from equally spaced values.

    `spread` is sum((v_i / scale_i)^2) of the line's direction v, which turns the
    curvature along v into a typical per-coordinate |f2| * scale^2.  What the noise
    alone could produce is taken off each difference first (their noise is about
    2.5, 1.5 and 4.5 times the noise of one value), so a float32 cost's quantized
    values do not pass for curvature.  A kink on the line would pass for a huge
    curvature and third derivative everywhere, so those two come from the longer
    smooth side of it (see smooth_side).
    """
    f = np.asarray(values, dtype=float)
    # Plain Python on the line's few values, as the difference table (numpy's per-call
    # cost was most of a small check); the same float operations, so the same bits.
    fl = f.tolist()
    mid, half = len(fl) // 2, (len(fl) // 2) * t
    kink = _kink_point(fl)
    g = _side_of(fl, kink)
    noise, order = _noise_of_side(g)
    m = (len(g) - 1) // 2
    second = max(0.0, abs(g[2 * m] - 2 * g[m] + g[0]) - 4 * noise)
    centre = fl[mid]
    slope = max(0.0, max(abs(v - centre) for v in fl) - 3 * noise)
    third = max(0.0, max(map(abs, _differences(g, 3)), default=0.0) - 8 * noise)
    lone = len(g) < len(fl) and not _slope_changes(fl, kink - 1)
    return LineFeatures(noise, order, second / (m * t) ** 2 / spread, slope / half,
                        third / t ** 3, f, t, settled=table_settles(g, noise),
                        lone_value=lone)


def _differences(f: list, k: int) -> list:
    """The k-th differences of f, as np.diff(f, k) computes them."""
    for _ in range(k):
        f = [b - a for a, b in zip(f, f[1:])]
    return f


def smooth_side(values) -> np.ndarray:
    """The values on the longer side of a kink on the line, or all of them.

    A kink (|x| at 0, a ReLU at its hinge) puts one spike into the second
    differences; the side kept includes the point nearest the kink as an end point.
    """
    f = np.asarray(values, dtype=float)
    fl = f.tolist()
    side = _side_of(fl, _kink_point(fl))
    return f if len(side) == len(fl) else np.array(side)


def _side_of(f: list, p) -> list:
    """smooth_side of the values f (a list) whose spike point is p (or None)."""
    if p is not None:
        side = f[:p + 1] if p + 1 >= len(f) - p else f[p:]
        if len(side) >= 4:
            return side
    return f


def _kink_point(f: list):
    """The point nearest a spike in the second differences of the values f, or None.

    Plain Python on the few values of a line (numpy's per-call cost was most of it):
    the same float operations as np.diff, np.argmax, np.median and np.max, so the
    same answer bit for bit.  A spike stands more than 10 times above the median of
    the other second differences and above the rounding of the values.
    """
    second = [abs((c - b) - (b - a)) for a, b, c in zip(f, f[1:], f[2:])]
    if len(second) < 3 or any(x != x for x in second):   # a NaN is never a spike
        return None
    k = second.index(max(second))      # the first of the largest, as np.argmax
    rest = sorted(second[:k] + second[k + 1:])
    half = len(rest) // 2
    median = rest[half] if len(rest) % 2 else (rest[half - 1] + rest[half]) / 2
    largest = max(abs(v) for v in f)
    if second[k] > 10 * max(median, 1e-300) and \
            second[k] > 10 * np.finfo(float).eps * largest:
        return k + 1
    return None


def _slope_changes(f: list, k: int) -> bool:
    """Whether the spike in the k-th second difference of f is a change of slope (a
    kink): the signed second differences around it add up to at least half of it.  A
    value off the line (a float32 sum whose rounding steps by a few units in the last
    place at one point) makes a spike too, but the ones beside it cancel it (J, -J or
    J, -2J, J): the slopes on both sides are the same."""
    second = [(c - b) - (b - a) for a, b, c in zip(f, f[1:], f[2:])]
    around = second[max(0, k - 1):k + 2]
    return abs(sum(around)) >= 0.5 * abs(second[k])


def noise_from_values(values) -> tuple:
    """(noise level, order used) from equally spaced cost values along a line.

    Across a kink only the longer smooth side is used (see smooth_side).  A jump in
    a higher derivative (x |x| or a squared hinge at the point itself) is no spike
    in the second differences, but a difference table would read its pattern as
    noise; so where both sides of a break near the middle are smooth, with a level
    a tenth of the whole line's or less, the level of the sides is the answer.
    """
    return _noise_of_side(smooth_side(values).tolist())


def _noise_of_side(f: list) -> tuple:
    """noise_from_values of values already on one smooth side (see smooth_side)."""
    level, order = _difference_table_noise(f)
    if level == 0 or len(f) < 7:
        return level, order
    best = (level, order)
    for p in range(3, len(f) - 3):
        left = _difference_table_noise(f[:p + 1])
        if not (left[0] <= 0.1 * level and left[0] < best[0]):
            continue        # the larger side cannot qualify: its right needs no table
        right = _difference_table_noise(f[p:])
        sides = max(left[0], right[0])
        if sides <= 0.1 * level and sides < best[0]:
            best = (sides, max(left[1], right[1]))
    return best


def _difference_table_noise(f) -> tuple:
    """sigma_k = sqrt(gamma_k * mean((Delta^k f)^2)), gamma_k = (k!)^2 / (2k)!.

    The level is the first sigma_k (k >= 2) that agrees within a factor 4 with
    the next two, where the k-th differences change sign (so they are noise,
    not a smooth trend: a smooth function's differences fall away with the order,
    noise's do not).  Returns (0.0, 0) when every difference vanishes.  The values
    are divided by their largest size first, so that squaring cannot overflow (values
    near 1e252) or underflow (near 1e-252).

    Plain Python on the few values of a noise line: numpy's per-call overhead made
    this a quarter of a small check.  Every operation is the one numpy did, in its
    order (see _numpy_sum), so the results are bitwise those of the array version.
    """
    values = f if isinstance(f, list) else \
        [float(v) for v in np.asarray(f, dtype=float).reshape(-1)]
    if not values or not all(map(math.isfinite, values)):
        return 0.0, 0
    size = max(map(abs, values))
    if not size > 0:
        return 0.0, 0
    level, order = _difference_table_levels([v / size for v in values])
    return level * size, order


# gamma_k = (k!)^2 / (2k)! of the difference table, for the orders a line can have.
_GAMMA = [math.factorial(k) ** 2 / math.factorial(2 * k) for k in range(64)]


def _numpy_sum(a: list) -> float:
    """The float sum numpy's add.reduce gives for a contiguous float64 array: a plain
    loop below 8 values, eight running sums combined pairwise up to 128, halves
    summed recursively above (numpy's pairwise summation)."""
    n = len(a)
    if n < 8:
        total = 0.0
        for x in a:
            total += x
        return total
    if n <= 128:
        r = a[:8]
        for i in range(8, n - n % 8, 8):
            for j in range(8):
                r[j] += a[i + j]
        total = ((r[0] + r[1]) + (r[2] + r[3])) + ((r[4] + r[5]) + (r[6] + r[7]))
        for i in range(n - n % 8, n):
            total += a[i]
        return total
    half = n // 2
    half -= half % 8
    return _numpy_sum(a[:half]) + _numpy_sum(a[half:])


def _first_consistent(f) -> tuple:
    """(the first consistent order's (k, sigma_k, whether the k-th differences change
    sign) or None, every order seen) of values f scaled to at most 1 in size.  It stops
    as soon as an order's next two are known: the orders above it cannot change the
    answer (it is nonzero, so not all vanish).  sigma_k = sqrt(gamma_k mean(d_k^2))."""
    sigmas = []
    diffs = f
    for k in range(1, len(f) - 1):
        diffs = [b - a for a, b in zip(diffs, diffs[1:])]
        mean = _numpy_sum([d * d for d in diffs]) / len(diffs)
        gamma = _GAMMA[k] if k < len(_GAMMA) else math.factorial(k) ** 2 / math.factorial(2 * k)
        sigmas.append((k, math.sqrt(gamma * mean), max(diffs) > 0 and min(diffs) < 0))
        if k >= 4 and _consistent(*sigmas[-3:]):     # the first order must be 2 or more
            return sigmas[-3], sigmas
    return None, sigmas


def _difference_table_levels(f) -> tuple:
    """(level, order) of values f scaled to at most 1 in size, all finite (so no
    difference overflows or is NaN, and max / min say whether any is > 0 / < 0)."""
    found, sigmas = _first_consistent(f)
    if found is not None:
        return found[1], found[0]
    if all(s == 0 for _, s, _ in sigmas):
        return 0.0, 0
    # No consistent order: the smallest spread seen bounds the noise from above.
    candidates = [item for item in sigmas if item[0] >= 2] or sigmas
    k, s, _ = min(candidates, key=lambda item: item[1])
    return s, k


def table_settles(f: list, level: float) -> bool:
    """Do the values' differences settle at a noise level, or vanish?  False where no
    order of the table agrees with the next two (see _difference_table_levels) while the
    level is above the values' rounding: a smooth cost that varies on a length shorter
    than the spacing (a pole or a fast oscillation next to the point), whose table
    never levels off, so that its smallest spread is no noise level at all."""
    size = max((abs(v) for v in f), default=0.0)
    if not level > ROUNDING_CHANGE * np.finfo(float).eps * size:
        return True
    return _first_consistent([v / size for v in f])[0] is not None


def _consistent(first, second, third) -> bool:
    """Order k's sigma is the noise level: k >= 2, its differences change sign, and it
    agrees within a factor 4 with the next two orders' (all nonzero)."""
    (k, s, changes), (_, s1, _), (_, s2, _) = first, second, third
    return k >= 2 and changes and s > 0 and s1 > 0 and s2 > 0 and \
        0.25 <= s / s1 <= 4 and 0.25 <= s / s2 <= 4


@dataclass
class Kinks:
    found: np.ndarray        # a kink lies within the stencil of this coordinate
    low: np.ndarray          # smaller one-sided slope (extrapolated to step 0)
    high: np.ndarray         # larger one-sided slope
    slack: np.ndarray        # how far either slope may be off: their step error and rounding


def one_sided_levels(method: str, values: np.ndarray, f0: float, h: np.ndarray):
    """One-sided slopes at two steps, or None for stencils with one level.

    Returns (forward near, backward near, forward far, backward far, near step):
    the slopes (f(x + s) - f(x)) / s and (f(x) - f(x - s)) / s at the shorter
    and the longer step, the longer one twice the shorter.
    """
    f = values.real
    if method == "richardson":       # offsets 1, -1, 1/2, -1/2
        near, far, hn = (2, 3), (0, 1), h / 2
    elif method == "five-point":     # offsets 1, -1, 2, -2
        near, far, hn = (0, 1), (2, 3), h
    else:
        return None
    hf = 2 * hn
    return ((f[:, near[0]] - f0) / hn, (f0 - f[:, near[1]]) / hn,
            (f[:, far[0]] - f0) / hf, (f0 - f[:, far[1]]) / hf, hn)


def find_kinks(method: str, values: np.ndarray, f0: float, h: np.ndarray,
               noise: np.ndarray) -> Kinks:
    """Kinks: where the one-sided slopes differ by more than smoothness allows.

    For a smooth cost the jump D+ - D- equals h * f2, so halving the step halves it;
    across a kink it stays (about) the same.  A kink is reported where the jump at
    the shorter step is at least 3/4 of the jump at the longer one and well above
    the rounding of the one-sided slopes (20 noise / step).

    Each one-sided slope has an O(s) step error of its own (the pieces on either
    side of a kink are curved too), so the slopes are extrapolated to s = 0 from
    both steps, 2 D(s) - D(2s), and the distance |D(s) - D(2s)| plus their
    rounding is kept as their slack: the test "between the slopes" allows it.
    """
    n = len(h)
    levels = one_sided_levels(method, values, f0, h)
    if levels is None:
        zero = zeros(n)      # read-only zeros of no memory
        return Kinks(np.zeros(n, dtype=bool), zero, zero, zero)
    dp, dm, dp_far, dm_far, step_near = levels
    jump_near, jump_far = dp - dm, dp_far - dm_far
    eps = np.finfo(float).eps
    rounding = 2 * noise / step_near + 10 * eps * np.maximum(np.abs(dp), np.abs(dm))
    kink = (np.abs(jump_near) > 10 * rounding) & (np.abs(jump_near) >= 0.75 * np.abs(jump_far))
    plus, minus = 2 * dp - dp_far, 2 * dm - dm_far
    slack = np.abs(dp - dp_far) + np.abs(dm - dm_far) + 3 * rounding
    return Kinks(kink, np.minimum(plus, minus), np.maximum(plus, minus), slack)
