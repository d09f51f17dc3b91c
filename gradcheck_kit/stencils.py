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


def power_of_two(h: np.ndarray) -> np.ndarray:
    """Largest power of two not above h (positive h)."""
    return np.exp2(np.floor(np.log2(h)))


def combine(method: str, values: np.ndarray, f0: float, h: np.ndarray, eps_f,
            scale: np.ndarray) -> Estimates:
    """Derivative estimates from `values` of shape (n, len(OFFSETS[method])).

    eps_f is the relative accuracy of the cost's values (machine epsilon of its
    dtype, or its measured noise over |f0|, whichever is larger).
    """
    f = values
    fmax = np.max(np.abs(f.real), axis=1, initial=abs(f0)) if f.size else np.zeros(0)
    noise = eps_f * fmax
    if method == "complex-step":
        d = f[:, 0].imag / h
        return Estimates(d, h ** 2 * np.abs(d) / (6 * scale ** 2), eps_f * np.abs(d))
    if method in ("forward", "backward"):
        sign = 1.0 if method == "forward" else -1.0
        d = sign * (f[:, 0] - f0) / h
        # Model: |f''| ~ |f'| / scale, one characteristic length per coordinate.
        return Estimates(d, h * np.abs(d) / (2 * scale), 2 * noise / h)
    central = (f[:, 0] - f[:, 1]) / (2 * h)
    if method == "central":
        second = (f[:, 0] - 2 * f0 + f[:, 1]) / h ** 2
        # Truncation h^2 f'''/6 with the model |f'''| ~ |f''|/scale + |f'|/scale^2.
        trunc = h ** 2 / 6 * (np.abs(second) / scale + np.abs(central) / scale ** 2)
        return Estimates(central, trunc, noise / h)
    if method == "five-point":
        d = (8 * (f[:, 0] - f[:, 1]) - (f[:, 2] - f[:, 3])) / (12 * h)
        # Truncation h^4 f^(5)/30 with the model |f^(5)| ~ |f'''| / scale^2, where
        # |d - central| estimates h^2 |f'''| / 6.
        trunc = (h / scale) ** 2 * np.abs(d - central) / 5 + h ** 4 * np.abs(d) / (30 * scale ** 4)
        return Estimates(d, trunc, 1.5 * noise / h)
    if method == "richardson":
        half = (f[:, 2] - f[:, 3]) / h          # central difference at h/2
        d = (4 * half - central) / 3            # eliminates the h^2 term
        # Conservative error estimate after Ridders (1982): the extrapolated value
        # is trusted to within its distance from the best plain difference.
        return Estimates(d, np.abs(d - half), 3 * noise / h)
    raise ValueError(f"unknown method {method!r}")


def complex_probe_agrees(fc, real_values, f0: float, hc: float, t: float, eps_f: float) -> tuple:
    """Is the cost complex-safe?  (safe, reason) from one probe along a direction v.

    fc = f(x + i hc v) must be complex with Re fc = f(x) and Im fc / hc equal to
    the central difference (f(x + t v) - f(x - t v)) / 2t within its accuracy.
    A cost that takes abs(), drops the imaginary part or branches on it fails.
    """
    fc = complex(fc)
    fp, fm = (float(np.real(v)) for v in real_values)
    if not (np.isfinite(fc.real) and np.isfinite(fc.imag)):
        return False, "the cost is not finite at a complex point"
    size = max(abs(f0), abs(fp), abs(fm))
    if abs(fc.real - f0) > 1e-8 * size + 1e-300:
        return False, "the real part of the cost changes at a complex point"
    dc, dr = fc.imag / hc, (fp - fm) / (2 * t)
    tol = 1e-3 * max(abs(dc), abs(dr)) + 10 * eps_f * size / t
    if abs(dc - dr) > tol:
        return False, ("the complex step disagrees with a central difference along a random "
                       f"direction ({dc:.6g} vs {dr:.6g}): the cost is not complex-safe")
    return True, ""
