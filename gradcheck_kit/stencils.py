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

METHODS = ("forward", "backward", "central", "five-point", "richardson", "complex-step")

# Offsets, in units of the step h, at which each method evaluates the cost.
OFFSETS = {
    "forward": (1.0,),
    "backward": (-1.0,),
    "central": (1.0, -1.0),
    "five-point": (1.0, -1.0, 2.0, -2.0),
    "richardson": (1.0, -1.0, 0.5, -0.5),   # central differences at h and h/2, extrapolated
    "complex-step": (1j,),
}

# Exponent of eps in the step: 1/(p+1) for truncation order p.
STEP_POWER = {"forward": 1 / 2, "backward": 1 / 2, "central": 1 / 3,
              "five-point": 1 / 5, "richardson": 1 / 5}

# The complex step has no subtractive cancellation, so h can be tiny; 1e-20 makes the
# O(h^2) truncation vanish (Squire & Trapp, SIAM Review 40(1), 1998).
COMPLEX_STEP = 1e-20


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


def scale_of(x: np.ndarray) -> np.ndarray:
    """The size that a coordinate's step is relative to: max(|x_i|, 1)."""
    return np.maximum(np.abs(x), 1.0)


def default_steps(method: str, x: np.ndarray, eps: np.ndarray) -> np.ndarray:
    """Automatic steps: eps^(1/(p+1)) * max(|x_i|, 1), rounded down to a power of two."""
    if method == "complex-step":
        return COMPLEX_STEP * scale_of(x)
    return power_of_two(eps ** STEP_POWER[method] * scale_of(x))


def power_of_two(h):
    """Largest power of two not above h (positive h)."""
    return np.exp2(np.floor(np.log2(h)))


def combine(method: str, values: np.ndarray, f0: float, h: np.ndarray, eps_f,
            scale: np.ndarray, noise_level: float = 0.0, curvature_hint=0.0,
            third_hint=0.0) -> Estimates:
    """Derivative estimates from `values` of shape (n, len(OFFSETS[method])).

    eps_f is the relative accuracy of the cost's values (machine epsilon of its
    dtype, or its measured noise over |f0|, whichever is larger); noise_level the
    measured absolute noise of one value (see noise_from_values); curvature_hint
    and third_hint a typical |f2| and |f3| for stencils that see none.  Below, f1, f2,
    f3, f5 name the first, second, third and fifth derivatives.
    """
    f = values
    fmax = np.max(np.abs(f.real), axis=1, initial=abs(f0)) if f.size else np.zeros(0)
    noise = np.maximum(eps_f * fmax, noise_level)
    est = _estimate(method, f, f0, h, eps_f, scale, noise, curvature_hint, third_hint)
    if est.gap is None:
        est.gap = np.zeros(len(h))
    est.noise = noise
    return est


def _estimate(method, f, f0, h, eps_f, scale, noise, curvature_hint, third_hint) -> Estimates:
    zero = np.zeros(len(h))
    if method == "complex-step":
        d = f[:, 0].imag / h
        # Truncation h^2 |f3| / 6, with |f3| from the model |f1| / scale^2 or the hint.
        f3 = np.maximum(np.abs(d) / scale ** 2, third_hint)
        # Rounding: the imaginary part is a sum of terms of about |f1| and |f0| / scale.
        return Estimates(d, h ** 2 * f3 / 6, 4 * eps_f * (np.abs(d) + abs(f0) / scale), zero)
    if method in ("forward", "backward"):
        sign = 1.0 if method == "forward" else -1.0
        d = sign * (f[:, 0] - f0) / h
        # Truncation h |f2| / 2 with the model |f2| ~ max(|f1| / scale, typical |f2|).
        f2 = np.maximum(np.abs(d) / scale, curvature_hint)
        return Estimates(d, h * f2 / 2, 2 * noise / h, zero)
    central = (f[:, 0] - f[:, 1]) / (2 * h)
    second = np.abs(f[:, 0] - 2 * f0 + f[:, 1]) / h ** 2
    if method == "central":
        # Truncation h^2 |f3| / 6.  Model: the cost varies on a length L, so |f3| ~ |f2| / L,
        # with L the larger of |f1| / |f2| (exact for exponentials) capped below at 64 h,
        # and the coordinate's scale; never below the third derivative seen on the line.
        length = np.clip(np.abs(central) / np.maximum(second, 1e-300), 64 * h, scale)
        f3 = np.maximum(second / length + np.abs(central) / scale ** 2, third_hint)
        trunc = h ** 2 / 6 * f3
        return Estimates(central, trunc, noise / h, second)
    if method == "five-point":
        d = (8 * (f[:, 0] - f[:, 1]) - (f[:, 2] - f[:, 3])) / (12 * h)
        # The stencil is one Richardson step on C(h) and C(2h); its error is bounded,
        # conservatively as in Ridders (1982), by its distance from C(h).
        gap = np.abs(d - central)
        return Estimates(d, gap, 1.5 * noise / h, second, gap.copy())  # two fields, two arrays
    if method == "richardson":
        half = (f[:, 2] - f[:, 3]) / h          # central difference at h/2
        d = (4 * half - central) / 3            # eliminates the h^2 term
        # Conservative error estimate after Ridders (1982): the extrapolated value
        # is trusted to within its distance from the best plain difference.
        gap = np.abs(d - half)
        return Estimates(d, gap, 3 * noise / h, second, gap.copy())
    raise ValueError(f"unknown method {method!r}")


REFINABLE = ("five-point", "richardson")   # methods with an embedded lower-order value


def refined_steps(est: Estimates, h: np.ndarray) -> np.ndarray:
    """Shorter steps for coordinates whose lower-order gap dominates their rounding.

    With the gap G ~ |f3| h^2 and rounding U ~ eps |f| / h, the step that balances
    them is h (U / G)^(1/3); never below h / 1024.
    """
    ratio = np.cbrt(est.rounding / np.maximum(est.gap, 1e-300))
    return power_of_two(h * np.clip(ratio, 1 / 1024, 1.0))


def extrapolation_error(est: Estimates, terms: np.ndarray) -> np.ndarray:
    """Modelled error of a fourth-order value: about 8 G^2 / |f1| plus rounding.

    With the gap G ~ h^2 |f3| and the model |f5| ~ |f3|^2 / |f1|, the h^4 term is of
    order G^2 / |f1|; `terms` stands in for |f1| near zero.
    """
    size = np.maximum(np.abs(est.derivative), terms)
    return 8 * est.gap ** 2 / np.maximum(size, 1e-300) + est.rounding


def pick_refined(first: Estimates, second: Estimates, terms: np.ndarray) -> np.ndarray:
    """For each refined coordinate: is the second value's modelled error the smaller?"""
    return extrapolation_error(second, terms) < extrapolation_error(first, terms)


def complex_probe_agrees(fc, real_values, f0: float, hc: float, t: float, eps_f: float) -> tuple:
    """Is the cost complex-safe?  (safe, reason) from one probe along a direction v.

    fc = f(x + i hc v) must be complex with Re fc = f(x), and Im fc / hc must equal
    the central difference C(t) = (f(x + t v) - f(x - t v)) / 2t within its error,
    estimated from C(2t) (real_values holds f at x + t v, x - t v, x + 2t v, x - 2t v).
    A cost that takes abs(), drops the imaginary part or branches on it fails.
    """
    fc = complex(fc)
    fp, fm, fp2, fm2 = (float(np.real(v)) for v in real_values)
    if not (np.isfinite(fc.real) and np.isfinite(fc.imag)):
        return False, "the cost is not finite at a complex point"
    size = max(abs(f0), abs(fp), abs(fm), abs(fp2), abs(fm2))
    if abs(fc.real - f0) > 1e-6 * size + 1e-30:
        return False, "the real part of the cost changes at a complex point"
    dc, c1, c2 = fc.imag / hc, (fp - fm) / (2 * t), (fp2 - fm2) / (4 * t)
    tol = 1e-3 * max(abs(dc), abs(c1)) + 2 * abs(c2 - c1) + 10 * eps_f * size / t
    if abs(dc - c1) > tol:
        return False, ("the complex step disagrees with a central difference along a random "
                       f"direction ({dc:.6g} vs {c1:.6g}): the cost is not complex-safe")
    return True, ""




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

    @staticmethod
    def none() -> "LineFeatures":
        return LineFeatures(0.0, 0, 0.0, 0.0, 0.0, np.zeros(0))


def line_features(values, t: float, spread: float) -> LineFeatures:
    """Noise, typical curvature, slope and third derivative from equally spaced values.

    `spread` is sum((v_i / scale_i)^2) of the line's direction v, which turns the
    curvature along v into a typical per-coordinate |f2| * scale^2.  What the noise
    alone could produce is taken off each difference first (their noise is about
    2.5, 1.5 and 4.5 times the noise of one value), so a float32 cost's quantized
    values do not pass for curvature.
    """
    f = np.asarray(values, dtype=float)
    mid, half = len(f) // 2, (len(f) // 2) * t
    noise, order = noise_from_values(f)
    second = max(0.0, abs(f[-1] - 2 * f[mid] + f[0]) - 4 * noise)
    slope = max(0.0, float(np.max(np.abs(f - f[mid]))) - 3 * noise)
    third = max(0.0, float(np.max(np.abs(np.diff(f, 3)))) - 8 * noise)
    return LineFeatures(noise, order, second / half ** 2 / spread, slope / half, third / t ** 3, f,
                        t)


def noise_from_values(values) -> tuple:
    """(noise level, order used) from equally spaced cost values along a line.

    A kink on the line (|x| at 0, a ReLU at its hinge) puts one spike into the
    second differences that would pass for noise; then only the points on the
    longer side of the kink, which include it as an end point, are used.
    """
    f = np.asarray(values, dtype=float)
    second = np.abs(np.diff(f, 2))
    if second.size >= 3:
        k = int(np.argmax(second))
        rest = np.delete(second, k)
        if second[k] > 10 * max(float(np.median(rest)), 1e-300) and \
                second[k] > 10 * np.finfo(float).eps * float(np.max(np.abs(f))):
            p = k + 1                      # the point nearest the kink
            side = f[:p + 1] if p + 1 >= len(f) - p else f[p:]
            if len(side) >= 4:
                return _difference_table_noise(side)
    return _difference_table_noise(f)


def _difference_table_noise(f) -> tuple:
    """sigma_k = sqrt(gamma_k * mean((Delta^k f)^2)), gamma_k = (k!)^2 / (2k)!.

    The level is the first sigma_k (k >= 2) that agrees within a factor 4 with
    the next two, where the k-th differences change sign (so they are noise,
    not a smooth trend: a smooth function's differences fall away with the order,
    noise's do not).  Returns (0.0, 0) when every difference vanishes.
    """
    diffs, sigmas = f, []
    for k in range(1, len(f) - 1):
        diffs = np.diff(diffs)
        gamma = math.factorial(k) ** 2 / math.factorial(2 * k)
        sigmas.append((k, math.sqrt(gamma * float(np.mean(diffs ** 2))),
                       bool(np.any(diffs > 0) and np.any(diffs < 0))))
    if all(s == 0 for _, s, _ in sigmas):
        return 0.0, 0
    for (k, s, changes), (_, s1, _), (_, s2, _) in zip(sigmas, sigmas[1:], sigmas[2:]):
        if k >= 2 and changes and s > 0 and s1 > 0 and s2 > 0 and \
                0.25 <= s / s1 <= 4 and 0.25 <= s / s2 <= 4:
            return s, k
    # No consistent order: the smallest spread seen bounds the noise from above.
    candidates = [item for item in sigmas if item[0] >= 2] or sigmas
    k, s, _ = min(candidates, key=lambda item: item[1])
    return s, k


@dataclass
class Kinks:
    found: np.ndarray        # a kink lies within the stencil of this coordinate
    low: np.ndarray          # smaller one-sided slope at the shorter step
    high: np.ndarray         # larger one-sided slope


def one_sided_levels(method: str, values: np.ndarray, f0: float, h: np.ndarray):
    """One-sided slope differences at two steps, (near, far), or None for one level.

    Returns (d_plus_near, d_minus_near, jump_near, jump_far): the forward and
    backward slopes at the shorter step and the jumps D+ - D- at both steps.
    """
    f = values.real
    if method == "richardson":       # offsets 1, -1, 1/2, -1/2
        near, far, hn, hf = (2, 3), (0, 1), h / 2, h
    elif method == "five-point":     # offsets 1, -1, 2, -2
        near, far, hn, hf = (0, 1), (2, 3), h, 2 * h
    else:
        return None
    dp = (f[:, near[0]] - f0) / hn
    dm = (f0 - f[:, near[1]]) / hn
    jump_far = (f[:, far[0]] - f0) / hf - (f0 - f[:, far[1]]) / hf
    return dp, dm, dp - dm, jump_far


def find_kinks(method: str, values: np.ndarray, f0: float, h: np.ndarray,
               noise: np.ndarray) -> Kinks:
    """Kinks: where the one-sided slopes differ by more than smoothness allows.

    For a smooth cost the jump D+ - D- equals h * f2, so halving the step halves it;
    across a kink it stays (about) the same.  A kink is reported where the jump at
    the shorter step is at least 3/4 of the jump at the longer one and well above
    the rounding of the one-sided slopes (20 noise / step).
    """
    n = len(h)
    levels = one_sided_levels(method, values, f0, h)
    if levels is None:
        zero = np.zeros(n)
        return Kinks(np.zeros(n, dtype=bool), zero, zero)
    dp, dm, jump_near, jump_far = levels
    step_near = h / 2 if method == "richardson" else h
    eps = np.finfo(float).eps
    above_noise = np.abs(jump_near) > 20 * noise / step_near + \
        100 * eps * np.maximum(np.abs(dp), np.abs(dm))
    kink = above_noise & (np.abs(jump_near) >= 0.75 * np.abs(jump_far))
    return Kinks(kink, np.minimum(dp, dm), np.maximum(dp, dm))
