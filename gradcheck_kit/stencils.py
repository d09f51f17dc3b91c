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

    @property
    def error(self) -> np.ndarray:
        return self.truncation + self.rounding


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
        # and the coordinate's scale.
        length = np.clip(np.abs(central) / np.maximum(second, 1e-300), 64 * h, scale)
        trunc = h ** 2 / 6 * (second / length + np.abs(central) / scale ** 2)
        return Estimates(central, trunc, noise / h, second)
    if method == "five-point":
        d = (8 * (f[:, 0] - f[:, 1]) - (f[:, 2] - f[:, 3])) / (12 * h)
        # The stencil is one Richardson step on C(h) and C(2h); its error is bounded,
        # conservatively as in Ridders (1982), by its distance from C(h).
        trunc = np.abs(d - central)
        return Estimates(d, trunc, 1.5 * noise / h, second, np.abs(d - central))
    if method == "richardson":
        half = (f[:, 2] - f[:, 3]) / h          # central difference at h/2
        d = (4 * half - central) / 3            # eliminates the h^2 term
        # Conservative error estimate after Ridders (1982): the extrapolated value
        # is trusted to within its distance from the best plain difference.
        return Estimates(d, np.abs(d - half), 3 * noise / h, second, np.abs(d - half))
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


def pick_refined(first: Estimates, second: Estimates, terms: np.ndarray) -> tuple:
    """(use second?, its modelled error) for each refined coordinate."""
    e1 = extrapolation_error(first, terms)
    e2 = extrapolation_error(second, terms)
    return e2 < e1, np.minimum(e1, e2)


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


def directional_curvature(real_values, f0: float, t: float) -> float:
    """|v' H v| from f(x + t v) and f(x - t v)."""
    return abs(float(np.real(real_values[0])) - 2 * f0 + float(np.real(real_values[1]))) / t ** 2


# Noise: the difference-table method of More & Wild, "Estimating computational noise",
# SIAM J. Sci. Comput. 33(3), 2011, written here from the paper's idea.  Along a line
# with spacing t the k-th differences of a smooth function shrink like t^k, while
# those of noise of size s keep a spread of about s * sqrt((2k)! / (k!)^2).
NOISE_POINTS = 9          # f at x + j t v for j = -4..4 (the centre is f0)
NOISE_SPACING = 2.0 ** -20  # t (about 1e-6) relative to the coordinate scales


def noise_from_values(values) -> tuple:
    """(noise level, order used) from equally spaced cost values along a line.

    sigma_k = sqrt(gamma_k * mean((Delta^k f)^2)), gamma_k = (k!)^2 / (2k)!.
    The level is the first sigma_k (k >= 2) that agrees within a factor 4 with
    the next one, where the k-th differences change sign (so they are noise,
    not a smooth trend).  Returns (0.0, 0) when every difference vanishes.
    """
    f = np.asarray(values, dtype=float)
    diffs, sigmas = f, []
    for k in range(1, len(f) - 1):
        diffs = np.diff(diffs)
        gamma = math.factorial(k) ** 2 / math.factorial(2 * k)
        sigmas.append((k, math.sqrt(gamma * float(np.mean(diffs ** 2))),
                       bool(np.any(diffs > 0) and np.any(diffs < 0))))
    if all(s == 0 for _, s, _ in sigmas):
        return 0.0, 0
    for (k, s, changes), (_, s_next, _) in zip(sigmas, sigmas[1:]):
        if k >= 2 and changes and s > 0 and s_next > 0 and 0.25 <= s / s_next <= 4:
            return s, k
    # No consistent order: the smallest spread seen bounds the noise from above.
    k, s, _ = min((item for item in sigmas if item[0] >= 2), key=lambda item: item[1])
    return s, k
