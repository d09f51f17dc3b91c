"""Test problems of More, Garbow & Hillstrom, "Testing Unconstrained Optimization
Software", ACM TOMS 7(1), 17-41, 1981 (numbers in brackets are the paper's).

Written from the paper's definitions as remembered (from memory, not copied from
a file): residuals f_i, the cost F = sum f_i^2, the standard starting point x0,
and minimisers whose gradient is exactly zero where the paper gives them in
closed form.  Each residual function takes the coordinates and a math namespace,
so one definition serves numpy (and complex numbers), autograd and sympy; the
exact gradient comes from sympy (see `exact_gradient`).

Of the paper's 35 problems, 29 are here: [1]-[10], [12]-[18], [20]-[23], [25]-[32].
Left out (numbering from memory): [11] Gulf research and development, [19] Osborne 2,
[24] penalty II, [33] and [34] the linear rank-1 functions, [35] Chebyquad.  The
variable-dimension problems use one n each: the length of their x0 in PROBLEMS.

`helical_valley` is the paper's [7] on its x1 < 0 branch, from the paper's start.
`helical_valley_right` is our own variant, not a problem of the paper: the same function
on its x1 > 0 branch (where the paper's minimiser (1, 0, 0) lies), from a start of our
own choosing, (1, 0.1, 0.2).  Splitting [7] at x1 = 0 keeps each piece one smooth
formula for sympy.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass
from types import SimpleNamespace

import autograd.numpy as anp
import mpmath
import numpy as np
import sympy

NP = SimpleNamespace(exp=np.exp, sin=np.sin, cos=np.cos, sqrt=np.sqrt, atan=np.arctan, pi=np.pi)
AG = SimpleNamespace(exp=anp.exp, sin=anp.sin, cos=anp.cos, sqrt=anp.sqrt, atan=anp.arctan,
                     pi=np.pi)
SYM = SimpleNamespace(exp=sympy.exp, sin=sympy.sin, cos=sympy.cos, sqrt=sympy.sqrt,
                      atan=sympy.atan, pi=sympy.pi)


@dataclass(frozen=True)
class Problem:
    name: str
    residuals: object        # (x, m) -> list of residuals
    x0: tuple
    minimisers: tuple = ()   # points with an exactly zero gradient

    @property
    def n(self):
        return len(self.x0)

    def cost(self, x, m=NP):
        return sum(r * r for r in self.residuals(x, m))


def rosenbrock(x, m):  # [1]
    return [10 * (x[1] - x[0] ** 2), 1 - x[0]]


def freudenstein_roth(x, m):  # [2]
    return [-13 + x[0] + ((5 - x[1]) * x[1] - 2) * x[1],
            -29 + x[0] + ((x[1] + 1) * x[1] - 14) * x[1]]


def powell_badly_scaled(x, m):  # [3]
    return [10 ** 4 * x[0] * x[1] - 1, m.exp(-x[0]) + m.exp(-x[1]) - 1.0001]


def brown_badly_scaled(x, m):  # [4]
    return [x[0] - 10 ** 6, x[1] - 2e-6, x[0] * x[1] - 2]


def beale(x, m):  # [5]
    y = (1.5, 2.25, 2.625)
    return [y[i] - x[0] * (1 - x[1] ** (i + 1)) for i in range(3)]


def jennrich_sampson(x, m):  # [6], m = 10
    return [2 + 2 * i - (m.exp(i * x[0]) + m.exp(i * x[1])) for i in range(1, 11)]


def helical_valley_left(x, m):  # [7] on its x1 < 0 branch (the standard start (-1, 0, 0))
    theta = m.atan(x[1] / x[0]) / (2 * m.pi) + 0.5
    return [10 * (x[2] - 10 * theta), 10 * (m.sqrt(x[0] ** 2 + x[1] ** 2) - 1), x[2]]


def helical_valley_right(x, m):  # our variant: [7] on its x1 > 0 branch (see the docstring)
    theta = m.atan(x[1] / x[0]) / (2 * m.pi)
    return [10 * (x[2] - 10 * theta), 10 * (m.sqrt(x[0] ** 2 + x[1] ** 2) - 1), x[2]]


BARD_Y = (0.14, 0.18, 0.22, 0.25, 0.29, 0.32, 0.35, 0.39, 0.37, 0.58, 0.73, 0.96, 1.34, 2.10, 4.39)


def bard(x, m):  # [8]
    out = []
    for i in range(1, 16):
        u, v = i, 16 - i
        w = min(u, v)
        out.append(BARD_Y[i - 1] - (x[0] + u / (v * x[1] + w * x[2])))
    return out


GAUSS_Y = (0.0009, 0.0044, 0.0175, 0.0540, 0.1295, 0.2420, 0.3521, 0.3989, 0.3521, 0.2420,
           0.1295, 0.0540, 0.0175, 0.0044, 0.0009)


def gaussian(x, m):  # [9]
    return [x[0] * m.exp(-x[1] * ((8 - i) / 2 - x[2]) ** 2 / 2) - GAUSS_Y[i - 1]
            for i in range(1, 16)]


MEYER_Y = (34780, 28610, 23650, 19630, 16370, 13720, 11540, 9744, 8261, 7030, 6005, 5147, 4427,
           3820, 3307, 2872)


def meyer(x, m):  # [10]
    return [x[0] * m.exp(x[1] / (45 + 5 * i + x[2])) - MEYER_Y[i - 1] for i in range(1, 17)]


def box_3d(x, m):  # [12], m = 10
    out = []
    for i in range(1, 11):
        t = i / 10
        out.append(m.exp(-t * x[0]) - m.exp(-t * x[1]) - x[2] * (m.exp(-t) - m.exp(-10 * t)))
    return out


def powell_singular(x, m):  # [13]
    return [x[0] + 10 * x[1], m.sqrt(5) * (x[2] - x[3]), (x[1] - 2 * x[2]) ** 2,
            m.sqrt(10) * (x[0] - x[3]) ** 2]


def wood(x, m):  # [14]
    return [10 * (x[1] - x[0] ** 2), 1 - x[0], m.sqrt(90) * (x[3] - x[2] ** 2), 1 - x[2],
            m.sqrt(10) * (x[1] + x[3] - 2), (x[1] - x[3]) / m.sqrt(10)]


KO_Y = (0.1957, 0.1947, 0.1735, 0.1600, 0.0844, 0.0627, 0.0456, 0.0342, 0.0323, 0.0235, 0.0246)
KO_U = (4, 2, 1, 0.5, 0.25, 0.167, 0.125, 0.1, 0.0833, 0.0714, 0.0625)


def kowalik_osborne(x, m):  # [15]
    return [KO_Y[i] - x[0] * (u * u + u * x[1]) / (u * u + u * x[2] + x[3])
            for i, u in enumerate(KO_U)]


def brown_dennis(x, m):  # [16], m = 20
    out = []
    for i in range(1, 21):
        t = i / 5
        out.append((x[0] + t * x[1] - m.exp(t)) ** 2 + (x[2] + x[3] * m.sin(t) - m.cos(t)) ** 2)
    return out


OSB1_Y = (0.844, 0.908, 0.932, 0.936, 0.925, 0.908, 0.881, 0.850, 0.818, 0.784, 0.751, 0.718,
          0.685, 0.658, 0.628, 0.603, 0.580, 0.558, 0.538, 0.522, 0.506, 0.490, 0.478, 0.467,
          0.457, 0.448, 0.438, 0.431, 0.424, 0.420, 0.414, 0.411, 0.406)


def osborne_1(x, m):  # [17]
    return [OSB1_Y[i] - (x[0] + x[1] * m.exp(-10 * i * x[3]) + x[2] * m.exp(-10 * i * x[4]))
            for i in range(33)]


def biggs_exp6(x, m):  # [18], m = 13
    out = []
    for i in range(1, 14):
        t = i / 10
        y = m.exp(-t) - 5 * m.exp(-10 * t) + 3 * m.exp(-4 * t)
        out.append(x[2] * m.exp(-t * x[0]) - x[3] * m.exp(-t * x[1]) + x[5] * m.exp(-t * x[4]) - y)
    return out


def watson(x, m):  # [20], n = 6
    n = len(x)
    out = []
    for i in range(1, 30):
        t = i / 29
        s1 = sum((j - 1) * x[j - 1] * t ** (j - 2) for j in range(2, n + 1))
        s2 = sum(x[j - 1] * t ** (j - 1) for j in range(1, n + 1))
        out.append(s1 - s2 ** 2 - 1)
    return out + [x[0], x[1] - x[0] ** 2 - 1]


def extended_rosenbrock(x, m):  # [21]
    out = []
    for i in range(0, len(x), 2):
        out += [10 * (x[i + 1] - x[i] ** 2), 1 - x[i]]
    return out


def extended_powell(x, m):  # [22]
    out = []
    for i in range(0, len(x), 4):
        out += powell_singular(x[i:i + 4], m)
    return out


def penalty_1(x, m):  # [23], a = 1e-5
    a = 1e-5
    return [m.sqrt(a) * (xi - 1) for xi in x] + [sum(xi * xi for xi in x) - 0.25]


def variably_dimensioned(x, m):  # [25]
    n = len(x)
    s = sum((j + 1) * (x[j] - 1) for j in range(n))
    return [x[j] - 1 for j in range(n)] + [s, s * s]


def trigonometric(x, m):  # [26]
    n = len(x)
    c = sum(m.cos(xj) for xj in x)
    return [n - c + (i + 1) * (1 - m.cos(x[i])) - m.sin(x[i]) for i in range(n)]


def brown_almost_linear(x, m):  # [27]
    n = len(x)
    s = sum(x)
    prod = functools.reduce(lambda a, b: a * b, x)
    return [x[i] + s - (n + 1) for i in range(n - 1)] + [prod - 1]


def discrete_boundary(x, m):  # [28]
    n = len(x)
    h = 1 / (n + 1)
    out = []
    for i in range(n):
        t = (i + 1) * h
        left = x[i - 1] if i > 0 else 0
        right = x[i + 1] if i < n - 1 else 0
        out.append(2 * x[i] - left - right + h * h * (x[i] + t + 1) ** 3 / 2)
    return out


def discrete_integral(x, m):  # [29]
    n = len(x)
    h = 1 / (n + 1)
    t = [(j + 1) * h for j in range(n)]
    out = []
    for i in range(n):
        a = sum(t[j] * (x[j] + t[j] + 1) ** 3 for j in range(i + 1))
        b = sum((1 - t[j]) * (x[j] + t[j] + 1) ** 3 for j in range(i + 1, n))
        out.append(x[i] + h * ((1 - t[i]) * a + t[i] * b) / 2)
    return out


def broyden_tridiagonal(x, m):  # [30]
    n = len(x)
    return [(3 - 2 * x[i]) * x[i] - (x[i - 1] if i > 0 else 0)
            - 2 * (x[i + 1] if i < n - 1 else 0) + 1 for i in range(n)]


def broyden_banded(x, m):  # [31]
    n = len(x)
    out = []
    for i in range(n):
        band = [j for j in range(max(0, i - 5), min(n, i + 2)) if j != i]
        out.append(x[i] * (2 + 5 * x[i] ** 2) + 1 - sum(x[j] * (1 + x[j]) for j in band))
    return out


def linear_full_rank(x, m):  # [32], m = 2n
    n = len(x)
    s = sum(x)
    return [x[i] - 2 * s / (2 * n) - 1 for i in range(n)] + [-2 * s / (2 * n) - 1] * n


PROBLEMS = (
    Problem("rosenbrock", rosenbrock, (-1.2, 1.0), ((1.0, 1.0),)),
    Problem("freudenstein_roth", freudenstein_roth, (0.5, -2.0), ((5.0, 4.0),)),
    Problem("powell_badly_scaled", powell_badly_scaled, (0.0, 1.0)),
    Problem("brown_badly_scaled", brown_badly_scaled, (1.0, 1.0), ((1e6, 2e-6),)),
    Problem("beale", beale, (1.0, 1.0), ((3.0, 0.5),)),
    Problem("jennrich_sampson", jennrich_sampson, (0.3, 0.4)),
    Problem("helical_valley", helical_valley_left, (-1.0, 0.0, 0.0)),
    Problem("helical_valley_right", helical_valley_right, (1.0, 0.1, 0.2), ((1.0, 0.0, 0.0),)),
    Problem("bard", bard, (1.0, 1.0, 1.0)),
    Problem("gaussian", gaussian, (0.4, 1.0, 0.0)),
    Problem("meyer", meyer, (0.02, 4000.0, 250.0)),
    Problem("box_3d", box_3d, (0.0, 10.0, 20.0), ((1.0, 10.0, 1.0),)),
    Problem("powell_singular", powell_singular, (3.0, -1.0, 0.0, 1.0), ((0.0, 0.0, 0.0, 0.0),)),
    Problem("wood", wood, (-3.0, -1.0, -3.0, -1.0), ((1.0, 1.0, 1.0, 1.0),)),
    Problem("kowalik_osborne", kowalik_osborne, (0.25, 0.39, 0.415, 0.39)),
    Problem("brown_dennis", brown_dennis, (25.0, 5.0, -5.0, -1.0)),
    Problem("osborne_1", osborne_1, (0.5, 1.5, -1.0, 0.01, 0.02)),
    Problem("biggs_exp6", biggs_exp6, (1.0, 2.0, 1.0, 1.0, 1.0, 1.0),
            ((1.0, 10.0, 1.0, 5.0, 4.0, 3.0),)),
    Problem("watson", watson, (0.0,) * 6),
    Problem("extended_rosenbrock", extended_rosenbrock, (-1.2, 1.0) * 5, ((1.0,) * 10,)),
    Problem("extended_powell", extended_powell, (3.0, -1.0, 0.0, 1.0) * 2, ((0.0,) * 8,)),
    Problem("penalty_1", penalty_1, (1.0, 2.0, 3.0, 4.0)),
    Problem("variably_dimensioned", variably_dimensioned, tuple(1 - (j + 1) / 8 for j in range(8)),
            ((1.0,) * 8,)),
    Problem("trigonometric", trigonometric, (0.1,) * 10),
    Problem("brown_almost_linear", brown_almost_linear, (0.5,) * 10, ((1.0,) * 10,)),
    Problem("discrete_boundary", discrete_boundary,
            tuple((j / 11) * (j / 11 - 1) for j in range(1, 11))),
    Problem("discrete_integral", discrete_integral,
            tuple((j / 11) * (j / 11 - 1) for j in range(1, 11))),
    Problem("broyden_tridiagonal", broyden_tridiagonal, (-1.0,) * 10),
    Problem("broyden_banded", broyden_banded, (-1.0,) * 10),
    Problem("linear_full_rank", linear_full_rank, (1.0,) * 10),
)
BY_NAME = {p.name: p for p in PROBLEMS}


@functools.lru_cache(maxsize=None)
def _symbolic_gradient(name):
    p = BY_NAME[name]
    xs = sympy.symbols(f"x0:{p.n}")
    expr = p.cost(list(xs), SYM)
    grad = [sympy.diff(expr, v) for v in xs]
    return xs, sympy.lambdify(xs, grad, modules="mpmath"), sympy.lambdify(xs, grad, modules="numpy")


def differentiate_all() -> None:
    """Run sympy's differentiation of every problem now (about 8 s on the development
    machine); later calls of exact_gradient and float_gradient reuse it.  The session
    fixture `mgh_derivatives` (conftest.py) calls this, so the cost shows up once, in that
    fixture's setup, and not in whichever test happens to ask first."""
    for p in PROBLEMS:
        _symbolic_gradient(p.name)


def exact_gradient(name, x) -> np.ndarray:
    """The gradient at x, from sympy's exact derivative evaluated by mpmath at 40 digits."""
    _, high, _ = _symbolic_gradient(name)
    with mpmath.workdps(40):
        values = high(*[mpmath.mpf(float(v)) for v in x])
    return np.array([float(v) for v in values])


def float_gradient(name):
    """sympy's exact derivative evaluated in float64: a correct hand-written gradient."""
    _, _, low = _symbolic_gradient(name)
    return lambda x: np.array(low(*x), dtype=float)
