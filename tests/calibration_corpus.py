"""A corpus for calibrating error estimates, and the measurement over it.

The engine promises (see DESIGN.md): for every method, |numeric - exact| <=
error_estimate for at least 99.9% of coordinates over a broad corpus.  This
module builds that corpus, cost functions at points with their TRUE gradients,
and measures per method how often the promise holds.

Every exact gradient is computed independently of the engine, at 40 or more
decimal digits with mpmath, then rounded once to float64:

  * by mpmath.diff (high-precision numeric differentiation) of a high-precision
    twin of the cost: the cost's own numpy code run on mpmath numbers (see
    `Precise`), or the same formula written with mpmath functions where the
    cost calls scipy, statsmodels or scikit-learn;
  * by a handbook closed form evaluated with mpmath, for sums of special
    functions (DLMF section numbers beside each, quoted from memory).

Each case keeps its twin (`precise_cost`) and, where one exists, a gradient
of record in float64 (`library_gradient`: a handbook formula through
scipy.special, statsmodels' hand-written score, scikit-learn's loss gradient,
the hand-written gradients of ml_losses.py, sympy's derivative of the More,
Garbow & Hillstrom problems), so tests/test_calibration.py can check that the
corpus itself is right.

All data are invented (drawn with fixed seeds); no data set is downloaded.
"""
from __future__ import annotations

import functools
import math
import time
import warnings
import zlib
from collections import Counter
from dataclasses import dataclass
from types import SimpleNamespace

import mpmath
import numpy as np
from scipy import special

import gradcheck_kit as gk
import ml_losses
import mgh_problems

DPS = 40          # decimal digits of the exact gradients (mpmath raises this inside diff)
METHODS = ("forward", "backward", "central", "five-point", "richardson", "complex-step", "auto")
TWO_831 = 2.0 ** 831   # about 1.4e250: a power of two, so scaling a cost by it is exact


@dataclass(frozen=True)
class Case:
    """One cost at one point with its exact gradient.

    cost:              1-D float64 array -> float, plain numpy / scipy / library code
    point:             1-D float64 array
    exact_gradient:    the true gradient at point, rounded once to float64
    complex_safe:      the cost accepts complex input and its complex values are
                       accurate to rounding, so the complex step is fair to measure on it
    precise_cost:      the same function on a list of mpmath numbers (for sanity tests)
    library_gradient:  a float64 gradient of record, x -> array, or None
    source:            where the function and its derivative come from
    """
    name: str
    cost: object
    point: np.ndarray
    exact_gradient: np.ndarray
    complex_safe: bool
    family: str
    precise_cost: object = None
    library_gradient: object = None
    source: str = ""

    @property
    def size(self) -> int:
        return self.point.size


# --- high precision ------------------------------------------------------------------------------
def _mpf(v):
    """An mpmath number equal to v exactly (numpy scalars included)."""
    if isinstance(v, mpmath.mpf):
        return v
    if isinstance(v, (bool, int, np.integer)):
        return mpmath.mpf(int(v))
    return mpmath.mpf(float(v))


class Precise:
    """A real number at mpmath's working precision that numpy code can compute with.

    numpy applies a ufunc such as np.exp to an array of Python objects by calling
    the element's method of the same name (x.exp()), and +, *, <, ... by the
    usual operators; so a cost written with numpy (or autograd.numpy) runs
    unchanged, at high precision, on an object array of these.
    """
    __slots__ = ("v",)

    def __init__(self, v):
        self.v = v.v if isinstance(v, Precise) else _mpf(v)

    # arithmetic, with floats, ints and other Precise numbers on either side
    def __add__(self, o): return Precise(self.v + _value(o))
    def __radd__(self, o): return Precise(_value(o) + self.v)
    def __sub__(self, o): return Precise(self.v - _value(o))
    def __rsub__(self, o): return Precise(_value(o) - self.v)
    def __mul__(self, o): return Precise(self.v * _value(o))
    def __rmul__(self, o): return Precise(_value(o) * self.v)
    def __truediv__(self, o): return Precise(self.v / _value(o))
    def __rtruediv__(self, o): return Precise(_value(o) / self.v)
    def __pow__(self, o): return Precise(self.v ** _value(o))
    def __rpow__(self, o): return Precise(_value(o) ** self.v)
    def __neg__(self): return Precise(-self.v)
    def __pos__(self): return self
    def __abs__(self): return Precise(abs(self.v))
    def __lt__(self, o): return self.v < _value(o)
    def __le__(self, o): return self.v <= _value(o)
    def __gt__(self, o): return self.v > _value(o)
    def __ge__(self, o): return self.v >= _value(o)
    def __eq__(self, o): return self.v == _value(o)
    def __hash__(self): return hash(self.v)
    def __float__(self): return float(self.v)

    # the ufuncs the corpus costs use
    def exp(self): return Precise(mpmath.exp(self.v))
    def log(self): return Precise(mpmath.log(self.v))
    def log1p(self): return Precise(mpmath.log1p(self.v))
    def sqrt(self): return Precise(mpmath.sqrt(self.v))
    def tanh(self): return Precise(mpmath.tanh(self.v))
    def sin(self): return Precise(mpmath.sin(self.v))
    def cos(self): return Precise(mpmath.cos(self.v))
    def arctan(self): return Precise(mpmath.atan(self.v))


def _value(o):
    return o.v if isinstance(o, Precise) else _mpf(o)


def precise_version(cost):
    """The twin of a numpy cost: the same code run on Precise numbers."""
    def twin(xs):
        out = cost(np.array([Precise(v) for v in xs], dtype=object))
        if isinstance(out, np.ndarray):
            out = out.item()
        return out.v if isinstance(out, Precise) else _mpf(out)
    return twin


def mpmath_gradient(precise_cost, point, dps=DPS) -> np.ndarray:
    """Each partial derivative by mpmath.diff (it works at about twice dps internally)."""
    with mpmath.workdps(dps):
        x = [_mpf(v) for v in point]
        out = []
        for i in range(len(x)):
            def along(t, i=i):
                y = list(x)
                y[i] = t
                return precise_cost(y)
            out.append(float(mpmath.diff(along, x[i])))
    return np.array(out)


def closed_form_gradient(derivative, weights, x, dps=DPS) -> np.ndarray:
    """w_i f'(x_i) for a cost sum_i w_i f(x_i), with f' an mpmath closed form."""
    with mpmath.workdps(dps):
        return np.array([float(_mpf(w) * derivative(_mpf(v))) for w, v in zip(weights, x)])


def _seed(name: str) -> int:
    """A stable seed per case name, so every case draws its own fixed numbers."""
    return zlib.crc32(name.encode())


# --- 1. More, Garbow & Hillstrom problems --------------------------------------------------------
# mpmath stand-ins for the namespace the residual functions take (see mgh_problems.py).
MP = SimpleNamespace(exp=mpmath.exp, sin=mpmath.sin, cos=mpmath.cos, sqrt=mpmath.sqrt,
                     atan=mpmath.atan, pi=mpmath.pi)


def _mgh_points(problem, quick):
    """The standard start, 10 times it, random points nearby and the known minimisers."""
    x0 = np.array(problem.x0, dtype=float)
    yield "x0", x0
    yield "10x0", 10 * x0
    rng = np.random.default_rng(_seed(problem.name))
    for k in range(1 if quick else 4):
        # nearby: each coordinate moved by about a tenth of itself, and by 0.01
        z = rng.standard_normal((2, x0.size))
        yield f"near{k}", x0 + 0.1 * np.abs(x0) * z[0] + 0.01 * z[1]
    for k, m in enumerate(problem.minimisers):
        yield f"minimiser{k}", np.array(m, dtype=float)


def _sympy_gradient(name):
    """sympy's derivative of the problem in float64, built on first use (it takes seconds)."""
    return lambda x: mgh_problems.float_gradient(name)(x)


def mgh_cases(quick=False):
    """More, Garbow & Hillstrom (ACM TOMS 7(1), 1981), the problems of mgh_problems.py."""
    for p in mgh_problems.PROBLEMS:
        def twin(xs, p=p):
            return p.cost(xs, MP)
        for label, x in _mgh_points(p, quick):
            yield Case(f"mgh/{p.name}/{label}", p.cost, x, mpmath_gradient(twin, x),
                       complex_safe=True, family="mgh", precise_cost=twin,
                       library_gradient=_sympy_gradient(p.name),
                       source="More, Garbow & Hillstrom, ACM TOMS 7(1), 1981 (from memory)")


# --- 2. machine-learning losses of ml_losses.py --------------------------------------------------
def packing(params):
    """(pack, unpack) between a dict of arrays / floats and one 1-D vector (dict order)."""
    shapes = [(k, np.shape(v)) for k, v in params.items()]

    def pack(tree):
        return np.concatenate([np.ravel(np.asarray(tree[k], dtype=float)) for k, _ in shapes])

    def unpack(v):
        out, at = {}, 0
        for k, shape in shapes:
            size = int(np.prod(shape))
            out[k] = v[at:at + size].reshape(shape) if shape else v[at]
            at += size
        return out
    return pack, unpack


def ml_loss_cases(quick=False):
    """Common practice (no source): textbook losses with invented data, from ml_losses.py."""
    for factory in ml_losses.FACTORIES:
        for seed in range(1 if quick else 6):
            case = factory(np.random.default_rng(seed))
            pack, unpack = packing(case.params)

            def cost(v, case=case, unpack=unpack):
                return case.cost(unpack(v))

            def hand_gradient(v, case=case, unpack=unpack, pack=pack):
                return pack(case.gradient(unpack(v)))
            twin = precise_version(cost)
            x = pack(case.params)
            yield Case(f"ml/{case.name}/seed{seed}", cost, x, mpmath_gradient(twin, x),
                       complex_safe=True, family="ml", precise_cost=twin,
                       library_gradient=hand_gradient,
                       source="common practice: textbook loss (ml_losses.py)")


# --- 3. special functions through scipy.special --------------------------------------------------
@dataclass(frozen=True)
class Special:
    name: str
    function: object          # the scipy.special function in the cost
    precise: object           # the same function in mpmath
    derivative: object        # its derivative, a closed form in mpmath
    of_record: object         # that closed form through scipy.special, float64
    complex_safe: bool
    source: str
    arguments: dict           # label -> (low, high, spacing) of the points, or a list
    complex_unsafe: tuple = ()  # labels of argument sets where the complex step is unfair


def _log_abs_gamma(x):
    return mpmath.log(abs(mpmath.gamma(x)))


def _erfcx(x):
    return mpmath.exp(x * x) * mpmath.erfc(x)


def _expit(x):
    return 1 / (1 + mpmath.exp(-x))


# Real arguments of lnGamma and psi on the negative axis, kept at least 0.2 from the poles.
NEGATIVE = {"negative": [-0.5, -1.3, -2.7, -3.5, -4.5, -5.8, -7.4, -9.2, -11.5, -15.5,
                         -20.3, -30.6]}

SPECIALS = (
    Special("gammaln", special.gammaln, _log_abs_gamma, lambda x: mpmath.psi(0, x),
            special.psi, False, "DLMF 5.2.2: psi = Gamma'/Gamma, so (ln|Gamma|)' = psi",
            {"small": (1e-4, 0.5, "log"), "moderate": (0.6, 30.0, "lin"),
             "large": (40.0, 1e7, "log"), **NEGATIVE}),
    # loggamma accepts complex numbers; on the positive axis it equals gammaln.
    Special("loggamma", special.loggamma, _log_abs_gamma, lambda x: mpmath.psi(0, x),
            special.psi, True, "DLMF 5.2.2",
            {"small": (1e-4, 0.5, "log"), "moderate": (0.6, 30.0, "lin"),
             "large": (40.0, 1e7, "log")}),
    Special("psi", special.psi, lambda x: mpmath.psi(0, x), lambda x: mpmath.psi(1, x),
            lambda x: special.polygamma(1, x), True,
            "DLMF 5.15: psi^(n) is the n-th derivative of psi; scipy.special.polygamma",
            {"small": (1e-4, 0.5, "log"), "moderate": (0.6, 30.0, "lin"),
             "large": (40.0, 1e7, "log"), **NEGATIVE}),
    Special("erf", special.erf, mpmath.erf,
            lambda x: 2 / mpmath.sqrt(mpmath.pi) * mpmath.exp(-x * x),
            lambda x: 2 / np.sqrt(np.pi) * np.exp(-x * x), True,
            "DLMF 7.10.1: erf'(x) = 2/sqrt(pi) exp(-x^2)",
            {"central": (-3.0, 3.0, "lin"), "tail": (3.5, 6.0, "lin"),
             "far": (-30.0, -7.0, "lin")}),
    Special("erfc", special.erfc, mpmath.erfc,
            lambda x: -2 / mpmath.sqrt(mpmath.pi) * mpmath.exp(-x * x),
            lambda x: -2 / np.sqrt(np.pi) * np.exp(-x * x), True,
            "DLMF 7.10.1 with erfc = 1 - erf (DLMF 7.2.2)",
            # the tail's values are 1e-252 .. 1e-296: a cost near 1e-250.  There scipy's
            # complex erfc is off by up to 3e-11 relative (its real values by 6e-14).
            {"moderate": (-3.0, 5.0, "lin"), "tail": (24.0, 26.0, "lin")},
            complex_unsafe=("tail",)),
    # scipy's complex erfcx is off by up to 1.4e-13 relative near x = 5.5 (measured against
    # mpmath), more than rounding: not fair for the complex step.
    Special("erfcx", special.erfcx, _erfcx,
            lambda x: 2 * x * _erfcx(x) - 2 / mpmath.sqrt(mpmath.pi),
            lambda x: 2 * x * special.erfcx(x) - 2 / np.sqrt(np.pi), False,
            "DLMF 7.10.1 and erfcx = exp(x^2) erfc(x) (DLMF 7.2.3), product rule",
            {"negative": (-4.0, 0.0, "lin"), "moderate": (0.1, 10.0, "lin"),
             "large": (20.0, 1e6, "log")}),
    Special("j0", special.j0, lambda x: mpmath.besselj(0, x), lambda x: -mpmath.besselj(1, x),
            lambda x: -special.j1(x), False, "DLMF 10.6.3: J0' = -J1",
            {"moderate": (0.0, 20.0, "lin"), "large": (20.0, 80.0, "lin")}),
    # jv(0, z) accepts complex z but its complex values are wrong by up to 1e6 relative in the
    # imaginary part for tiny Im z (measured): the complex step must not be trusted on it.
    Special("jv0", lambda x: special.jv(0, x), lambda x: mpmath.besselj(0, x),
            lambda x: -mpmath.besselj(1, x), lambda x: -special.j1(x), False,
            "DLMF 10.6.3: J0' = -J1",
            {"moderate": (0.0, 20.0, "lin")}),
    Special("expit", special.expit, _expit, lambda x: _expit(x) * _expit(-x),
            lambda x: special.expit(x) * special.expit(-x), False,
            "scipy.special.expit docs (logistic sigmoid); derivative s(x) s(-x), common practice",
            {"moderate": (-8.0, 8.0, "lin"), "wide": (-40.0, 40.0, "lin")}),
    Special("log_expit", special.log_expit, lambda x: -mpmath.log1p(mpmath.exp(-x)),
            lambda x: _expit(-x), lambda x: special.expit(-x), False,
            "scipy.special.log_expit docs (log of the sigmoid); derivative s(-x), common practice",
            {"moderate": (-8.0, 8.0, "lin"), "wide": (-700.0, 40.0, "lin")}),
    # scipy's complex log_ndtr is off by up to 1e-9 relative for x in 4..7 (measured).
    Special("log_ndtr", special.log_ndtr, lambda x: mpmath.log(mpmath.ncdf(x)),
            lambda x: mpmath.npdf(x) / mpmath.ncdf(x),
            # phi / Phi = sqrt(2/pi) / erfcx(-x/sqrt(2)) (DLMF 7.2.3), accurate in the tail
            lambda x: np.sqrt(2 / np.pi) / special.erfcx(-x / np.sqrt(2)), False,
            "scipy.special.log_ndtr docs; derivative phi/Phi from the definition, common practice",
            {"moderate": (-8.0, 8.0, "lin"), "tail": (-1e4, -10.0, "log")}),
    Special("i0e", special.i0e, lambda x: mpmath.exp(-x) * mpmath.besseli(0, x),
            lambda x: mpmath.exp(-x) * (mpmath.besseli(1, x) - mpmath.besseli(0, x)),
            lambda x: special.i1e(x) - special.i0e(x), False,
            "DLMF 10.29.3: I0' = I1, so (e^-x I0)' = e^-x (I1 - I0) for x > 0",
            {"small": (1e-4, 1.0, "log"), "moderate": (1.0, 50.0, "lin"),
             "large": (100.0, 1e6, "log")}),
)


def _arguments(low, high, spacing, k):
    if spacing == "log":   # log-spaced, also for a negative range
        sign = -1.0 if high < 0 else 1.0
        return sign * np.geomspace(abs(low), abs(high), k)
    return np.linspace(low, high, k)


def separable_case(name, function, precise, derivative, *, x, weights, complex_safe, family,
                   source, of_record=None):
    """The cost sum_i w_i f(x_i): gradient w_i f'(x_i) from the closed form."""
    def cost(v):
        return np.sum(weights * function(v))

    def twin(xs):
        return mpmath.fsum(_mpf(w) * precise(t) for w, t in zip(weights, xs))
    record = None if of_record is None else (lambda v: weights * of_record(v))
    return Case(name, cost, x, closed_form_gradient(derivative, weights, x), complex_safe,
                family, twin, record, source)


def special_function_cases(quick=False):
    """Sums sum_i w_i f(x_i) of scipy.special functions, weights of both signs."""
    k = 4 if quick else 20
    for sp in SPECIALS:
        for label, arg in sp.arguments.items():
            name = f"special/{sp.name}/{label}"
            rng = np.random.default_rng(_seed(name))
            x = np.array(arg, dtype=float) if isinstance(arg, list) else _arguments(*arg, k)
            if quick:
                x = x[::3] if isinstance(arg, list) else x
            weights = rng.uniform(0.5, 2.0, x.size) * rng.choice([-1.0, 1.0], x.size)
            safe = sp.complex_safe and label not in sp.complex_unsafe
            yield separable_case(name, sp.function, sp.precise, sp.derivative, x=x,
                                 weights=weights, complex_safe=safe, family="special",
                                 source=sp.source, of_record=sp.of_record)


# --- 4. statsmodels log-likelihoods --------------------------------------------------------------
def _dot(row, b):
    """x_i . b at mpmath's precision (the row's floats are exact in mpmath)."""
    return mpmath.fsum(_mpf(a) * t for a, t in zip(row, b))


def statsmodels_cases(quick=False):
    """statsmodels' log-likelihoods as costs; its hand-written score as the gradient of record.

    Each cost is minus the model's loglike(params); the exact gradient is mpmath.diff of the
    same log-likelihood written with mpmath (the formula in statsmodels' docs and source).
    """
    try:
        import statsmodels  # noqa: F401  (in the test extra)
    except ImportError:     # the corpus test that wants every family then fails, saying so
        return
    n, d = 60, 4
    for label, build in (("logit", _logit), ("probit", _probit), ("poisson", _poisson),
                         ("negative_binomial", _negative_binomial), ("glm_gamma_log", _gamma)):
        rng = np.random.default_rng(_seed("statsmodels/" + label))
        # invented covariates: a constant column and three standard normal ones
        X = np.column_stack([np.ones(n), rng.standard_normal((n, d - 1))])
        model, twin, draw_point, complex_safe, options = build(X, rng)
        for k in range(1 if quick else 5):
            x = draw_point(rng)

            def cost(b, model=model, options=options):
                return -model.loglike(b, **options)

            def score(b, model=model, options=options):
                return -model.score(b, **options)
            yield Case(f"statsmodels/{label}/point{k}", cost, x, mpmath_gradient(twin, x),
                       complex_safe, "statsmodels", twin, score,
                       f"statsmodels {type(model).__name__}.loglike and its score")


def _logit(X, rng):
    """Invented pass / fail outcomes of machine parts against three measurements."""
    from statsmodels.discrete.discrete_model import Logit
    y = (X @ np.array([0.3, 1.0, -0.8, 0.5]) + rng.logistic(size=len(X)) > 0).astype(float)
    model = Logit(y, X)

    def twin(b):   # -sum log L(q_i x_i.b), L(t) = 1 / (1 + exp(-t)), q = 2y - 1
        return -mpmath.fsum(-mpmath.log1p(mpmath.exp(-(2 * yi - 1) * _dot(row, b)))
                            for row, yi in zip(X, y))
    return model, twin, lambda r: r.normal(0.0, 0.7, 4), True, {}


def _probit(X, rng):
    """Invented germinate / not outcomes of seed lots; statsmodels clips Phi at 2.2e-16,
    a kink far from these points."""
    from statsmodels.discrete.discrete_model import Probit
    y = (X @ np.array([-0.2, 0.9, 0.6, -0.4]) + rng.standard_normal(len(X)) > 0).astype(float)
    model = Probit(y, X)

    def twin(b):
        return -mpmath.fsum(mpmath.log(mpmath.ncdf((2 * yi - 1) * _dot(row, b)))
                            for row, yi in zip(X, y))
    # its cdf (scipy.special.ndtr through scipy.stats) takes complex input accurately
    return model, twin, lambda r: r.normal(0.0, 0.5, 4), True, {}


def _poisson(X, rng):
    """Invented counts of misdelivered parcels per route and day."""
    from statsmodels.discrete.discrete_model import Poisson
    y = rng.poisson(np.exp(X @ np.array([1.0, 0.4, -0.3, 0.2]))).astype(float)
    model = Poisson(y, X)

    def twin(b):
        return -mpmath.fsum(-mpmath.exp(_dot(row, b)) + yi * _dot(row, b)
                            - mpmath.loggamma(yi + 1) for row, yi in zip(X, y))
    return model, twin, lambda r: np.array([1.0, 0.4, -0.3, 0.2]) + r.normal(0, 0.2, 4), True, {}


def _negative_binomial(X, rng):
    """Invented overdispersed counts of garden-pest sightings; params (b, alpha), NB2."""
    from statsmodels.discrete.discrete_model import NegativeBinomial
    b_true = np.array([1.2, 0.3, -0.5, 0.1])
    mu = np.exp(X @ b_true)
    y = rng.negative_binomial(2.0, 2.0 / (2.0 + mu)).astype(float)
    model = NegativeBinomial(y, X, loglike_method="nb2")
    # The last parameter is log(alpha) when the model's private flag _transparams is set
    # (statsmodels 0.15 sets it in __init__), else alpha itself.
    log_alpha = bool(getattr(model, "_transparams", False))

    def twin(p):   # statsmodels' _ll_nbin with Q = 0: size 1/alpha, prob size / (size + mu)
        b = p[:-1]
        alpha = mpmath.exp(p[-1]) if log_alpha else p[-1]
        size = 1 / alpha
        total = []
        for row, yi in zip(X, y):
            m = mpmath.exp(_dot(row, b))
            prob = size / (size + m)
            total.append(mpmath.loggamma(size + yi) - mpmath.loggamma(yi + 1)
                         - mpmath.loggamma(size) + size * mpmath.log(prob)
                         + yi * mpmath.log(1 - prob))
        return -mpmath.fsum(total)

    def point(r):
        alpha = r.uniform(0.3, 0.8)
        return np.r_[b_true + r.normal(0, 0.2, 4), np.log(alpha) if log_alpha else alpha]
    # with complex params statsmodels switches to scipy's complex loggamma
    return model, twin, point, True, {}


def _gamma(X, rng):
    """Invented repair times, Gamma distributed with a log-linear mean; scale fixed at 1."""
    from statsmodels.genmod import families
    from statsmodels.genmod.generalized_linear_model import GLM
    b_true = np.array([0.5, 0.2, 0.3, -0.2])
    y = rng.gamma(2.0, np.exp(X @ b_true) / 2.0)
    model = GLM(y, X, family=families.Gamma(link=families.links.Log()))

    def twin(b):   # statsmodels' Gamma loglike_obs with var_weights = scale = 1
        total = []
        for row, yi in zip(X, y):
            ratio = yi / mpmath.exp(_dot(row, b))
            total.append(mpmath.log(ratio) - ratio - mpmath.log(yi))
        return -mpmath.fsum(total)
    # GLM's log link and Gamma family happen to compute complex parameters correctly
    # (checked by the complex-step test in test_calibration.py)
    return model, twin, lambda r: b_true + r.normal(0, 0.2, 4), True, {"scale": 1.0}


# --- 5. scikit-learn losses ----------------------------------------------------------------------
def _sklearn_loss_gradient(loss_name, X, y, factor):
    """scikit-learn's own gradient of its mean loss, times `factor`.

    LinearModelLoss (sklearn.linear_model._linear_loss) and the loss classes of
    sklearn._loss are PRIVATE modules: used here only as a gradient of record in the
    sanity tests, never by a cost; returns None where their interface has changed.
    """
    try:
        from sklearn._loss import loss as losses
        from sklearn.linear_model._linear_loss import LinearModelLoss
        base = {"binomial": losses.HalfBinomialLoss, "poisson": losses.HalfPoissonLoss,
                "tweedie": lambda: losses.HalfTweedieLoss(power=1.5)}[loss_name]()
        linear = LinearModelLoss(base_loss=base, fit_intercept=True)
    except Exception:   # pragma: no cover - a private interface moved
        return None

    def gradient(v):
        return factor * linear.gradient(np.asarray(v, dtype=float), X, y, l2_reg_strength=0.0)
    return gradient


def sklearn_cases(quick=False):
    """scikit-learn's public metrics as costs of linear-model weights (w..., intercept).

    sklearn.metrics.log_loss (mean binary cross-entropy), mean_poisson_deviance and
    mean_tweedie_deviance(power=1.5), each of a prediction from the weights.  These
    validate their input and take no complex numbers.
    """
    try:
        from sklearn import metrics   # in the test extra
    except ImportError:               # the corpus test that wants every family then fails
        return
    n, d = 50, 3
    rng = np.random.default_rng(_seed("sklearn"))
    X = rng.standard_normal((n, d))
    w_true = np.array([0.8, -0.5, 0.3])
    labels = (X @ w_true + rng.logistic(size=n) > 0).astype(float)   # invented yes / no answers
    counts = rng.poisson(np.exp(X @ w_true * 0.5 + 0.5)).astype(float)  # invented daily counts

    def linear(v):
        return X @ v[:d] + v[d]

    def mp_linear(v, row):
        return _dot(row, v[:d]) + v[d]

    def log_loss_cost(v):
        return metrics.log_loss(labels, special.expit(linear(v)))

    def log_loss_twin(v):   # mean of log(1 + exp(-q z)), q = 2y - 1
        return mpmath.fsum(mpmath.log1p(mpmath.exp(-(2 * yi - 1) * mp_linear(v, row)))
                           for row, yi in zip(X, labels)) / n

    def poisson_cost(v):
        return metrics.mean_poisson_deviance(counts, np.exp(linear(v)))

    def poisson_twin(v):   # 2 mean(y log(y / mu) - y + mu), y log y = 0 at y = 0
        return 2 * mpmath.fsum((yi * (mpmath.log(yi) - mp_linear(v, row)) if yi else 0)
                               - yi + mpmath.exp(mp_linear(v, row))
                               for row, yi in zip(X, counts)) / n

    def tweedie_cost(v):
        return metrics.mean_tweedie_deviance(counts, np.exp(linear(v)), power=1.5)

    def tweedie_twin(v):   # 2 mean(y^(2-p)/((1-p)(2-p)) - y mu^(1-p)/(1-p) + mu^(2-p)/(2-p))
        p = mpmath.mpf(1.5)
        total = []
        for row, yi in zip(X, counts):
            mu = mpmath.exp(mp_linear(v, row))
            total.append(_mpf(yi) ** (2 - p) / ((1 - p) * (2 - p)) - yi * mu ** (1 - p) / (1 - p)
                         + mu ** (2 - p) / (2 - p))
        return 2 * mpmath.fsum(total) / n

    for label, cost, twin, record in (
            ("log_loss", log_loss_cost, log_loss_twin,
             _sklearn_loss_gradient("binomial", X, labels, 1.0)),
            # the half deviances of sklearn._loss are half the metrics' deviances
            ("mean_poisson_deviance", poisson_cost, poisson_twin,
             _sklearn_loss_gradient("poisson", X, counts, 2.0)),
            ("mean_tweedie_deviance", tweedie_cost, tweedie_twin,
             _sklearn_loss_gradient("tweedie", X, counts, 2.0))):
        for k in range(1 if quick else 5):
            x = np.r_[w_true, 0.2] + 0.3 * rng.standard_normal(d + 1)
            yield Case(f"sklearn/{label}/point{k}", cost, x, mpmath_gradient(twin, x), False,
                       "sklearn", twin, record, f"scikit-learn sklearn.metrics.{label}")


# --- 6. smooth costs with large higher derivatives, and extreme magnitudes -----------------------
def steep_cases(quick=False):
    """Costs whose derivatives grow fast with the order, so truncation errors are large."""
    # sum(exp(30 x)): f^(k) = 30^k exp(30 x), common practice
    n = 200 if quick else 1000
    rng = np.random.default_rng(_seed("exp30"))
    x = rng.uniform(-0.1, 0.1, n)
    yield separable_case(f"steep/exp30/n{n}", lambda v: np.exp(30 * v),
                         lambda t: mpmath.exp(30 * t), lambda t: 30 * mpmath.exp(30 * t),
                         x=x, weights=np.ones(n), complex_safe=True, family="steep",
                         source="common practice: (e^(ax))' = a e^(ax)")
    # sum(exp(x)) near x = 575: a cost near 1e251
    rng = np.random.default_rng(_seed("exp575"))
    x = 575 + rng.uniform(-1, 1, 10 if quick else 40)
    yield separable_case("extreme/exp_near_575", np.exp, mpmath.exp, mpmath.exp,
                         x=x, weights=np.ones(x.size), complex_safe=True, family="extreme",
                         source="common practice: (e^x)' = e^x")
    # Lyness & Moler's e^x / sqrt(sin^3 x + cos^3 x), the complex-step test function of
    # Squire & Trapp (SIAM Review 40(1), 1998); it blows up at -pi/4 and 3pi/4.
    x = np.linspace(-0.7, 2.25, 6 if quick else 16)
    yield separable_case(
        "steep/lyness_moler", lambda v: np.exp(v) / np.sqrt(np.sin(v) ** 3 + np.cos(v) ** 3),
        lambda t: mpmath.exp(t) / mpmath.sqrt(mpmath.sin(t) ** 3 + mpmath.cos(t) ** 3),
        lambda t: mpmath.diff(lambda s: mpmath.exp(s) / mpmath.sqrt(mpmath.sin(s) ** 3
                                                                    + mpmath.cos(s) ** 3), t),
        x=x, weights=np.ones(x.size), complex_safe=True, family="steep",
        source="Squire & Trapp, SIAM Review 40(1), 1998; derivative by mpmath.diff")
    yield from cauchy_cases(quick)
    yield from binary_link_cases(quick)
    yield from tanh_mlp_cases(quick)


def cauchy_cases(quick=False):
    """Minus the Cauchy log-likelihood in its location parameters, one per group of data.

    log pdf(t; mu, g) = -log(pi g) - log(1 + ((t - mu) / g)^2) (the Cauchy density, common
    practice); with a small g the derivatives in mu grow like 1 / g^k."""
    groups, per, g = (5, 8, 0.02) if quick else (40, 15, 0.02)
    rng = np.random.default_rng(_seed("cauchy"))
    centre = rng.uniform(-3, 3, groups)
    data = centre[:, None] + g * rng.standard_cauchy((groups, per))
    mu = centre + rng.uniform(-0.03, 0.03, groups)     # near the data, within a few g

    def cost(m):
        u = (data - m[:, None]) / g
        return np.sum(np.log(np.pi * g) + np.log1p(u * u))

    def twin(m):
        return mpmath.fsum(mpmath.log(mpmath.pi * g)
                           + mpmath.log1p(((_mpf(t) - mk) / g) ** 2)
                           for mk, row in zip(m, data) for t in row)
    yield Case(f"steep/cauchy_location/g{g}", cost, mu, mpmath_gradient(twin, mu), True,
               "steep", twin, source="common practice: the Cauchy density")


def binary_link_cases(quick=False):
    """Minus Bernoulli log-likelihoods with the Cauchy (arctan) and probit links.

    cauchit: P = 1/2 + arctan(eta) / pi, the Cauchy distribution function; probit:
    log P = log_ndtr(eta) (scipy.special), both common practice.  Invented data."""
    n, d = 40, 4
    rng = np.random.default_rng(_seed("binary links"))
    X = rng.standard_normal((n, d))
    b_true = np.array([2.0, -1.5, 1.0, 0.5])
    y = (X @ b_true + rng.standard_normal(n) > 0).astype(float)

    def cauchit(b):
        p = 0.5 + np.arctan(X @ b) / np.pi
        return -np.sum(y * np.log(p) + (1 - y) * np.log(1 - p))

    def cauchit_twin(b):
        out = []
        for row, yi in zip(X, y):
            p = 0.5 + mpmath.atan(_dot(row, b)) / mpmath.pi
            out.append(yi * mpmath.log(p) + (1 - yi) * mpmath.log(1 - p))
        return -mpmath.fsum(out)

    def probit(b):   # log Phi(q eta), q = 2y - 1: deep in the tail for a large eta
        return -np.sum(special.log_ndtr((2 * y - 1) * (X @ b)))

    def probit_twin(b):
        return -mpmath.fsum(mpmath.log(mpmath.ncdf((2 * yi - 1) * _dot(row, b)))
                            for row, yi in zip(X, y))
    for k in range(1 if quick else 3):
        # points up to three times the data's own coefficients: |eta| reaches about 20
        b = b_true * (1 + k) + 0.3 * rng.standard_normal(d)
        yield Case(f"steep/cauchit/point{k}", cauchit, b, mpmath_gradient(cauchit_twin, b),
                   True, "steep", cauchit_twin, source="common practice: Cauchy (arctan) link")
        # scipy's complex log_ndtr is not accurate to rounding (see SPECIALS)
        yield Case(f"steep/probit_log_ndtr/point{k}", probit, b,
                   mpmath_gradient(probit_twin, b), False, "steep", probit_twin,
                   source="common practice: probit link; scipy.special.log_ndtr docs")


MLP_SIZES = (3, 6, 4)   # inputs, hidden, hidden; one output


def mlp_layout():
    """Names and shapes of a nested parameter tree: layers.0.W, layers.0.b, ..., head.w, head.b."""
    d, h1, h2 = MLP_SIZES
    return (("layers.0.W", (d, h1)), ("layers.0.b", (h1,)), ("layers.1.W", (h1, h2)),
            ("layers.1.b", (h2,)), ("head.w", (h2,)), ("head.b", ()))


def mlp_unpack(v):
    """The nested dict {'layers': [{'W', 'b'}, {'W', 'b'}], 'head': {'w', 'b'}} from a vector."""
    parts, at = {}, 0
    for name, shape in mlp_layout():
        size = int(np.prod(shape))
        parts[name] = v[at:at + size].reshape(shape) if shape else v[at]
        at += size
    return {"layers": [{"W": parts["layers.0.W"], "b": parts["layers.0.b"]},
                       {"W": parts["layers.1.W"], "b": parts["layers.1.b"]}],
            "head": {"w": parts["head.w"], "b": parts["head.b"]}}


def tanh_mlp_cases(quick=False):
    """Mean squared error of a two-hidden-layer tanh network with weights drawn as
    3 * normal: saturated units and large higher derivatives.  Invented regression data."""
    d = MLP_SIZES[0]
    size = sum(int(np.prod(s)) for _, s in mlp_layout())
    for seed in range(1 if quick else 5):
        rng = np.random.default_rng(_seed(f"tanh mlp {seed}"))
        X = rng.standard_normal((16, d))
        target = np.sin(X[:, 0]) * X[:, 1] + 0.3 * X[:, 2]

        def cost(v, X=X, target=target):
            p = mlp_unpack(v)
            a = X
            for layer in p["layers"]:
                a = np.tanh(a @ layer["W"] + layer["b"])
            r = a @ p["head"]["w"] + p["head"]["b"] - target
            return np.mean(r * r) / 2
        twin = precise_version(cost)
        x = 3.0 * rng.standard_normal(size)
        yield Case(f"steep/tanh_mlp/seed{seed}", cost, x, mpmath_gradient(twin, x), True,
                   "steep", twin, source="common practice: tanh network, squared error")


def _bump(u, m=np):
    """A smooth function whose features sit on a length of about 1 in u."""
    return m.exp(-u * u / 3) * m.cos(2 * u) + m.log1p(u * u)


def argument_scale_cases(quick=False):
    """sum_i w_i g(x_i / s): coordinates whose natural length s is far from 1.

    Steps are sized from max(|x|, 1), so for s = 1e-3 they are long compared with the
    features, and for s = 1e6 the points lie far from 0; the estimates must follow."""
    k = 8 if quick else 30
    mp = SimpleNamespace(exp=mpmath.exp, cos=mpmath.cos, log1p=mpmath.log1p)
    for s in (1e-3, 1e3, 1e6):
        name = f"scaling/bump/length{s:g}"
        rng = np.random.default_rng(_seed(name))
        x = s * np.linspace(-3.0, 3.0, k)
        weights = rng.uniform(0.5, 2.0, k) * rng.choice([-1.0, 1.0], k)

        def precise(t, s=s):
            return _bump(t / s, mp)

        def derivative(t, precise=precise):
            return mpmath.diff(precise, t)
        yield separable_case(name, lambda v, s=s: _bump(v / s), precise, derivative, x=x,
                             weights=weights, complex_safe=True, family="scaling",
                             source="common practice; derivative by mpmath.diff")


def scaled(case: Case, factor: float, label: str) -> Case:
    """The case with its cost times a power of two: every value and derivative is exactly
    scaled, so only the magnitude changes."""
    def cost(v):
        return factor * case.cost(v)

    def twin(xs):
        return _mpf(factor) * case.precise_cost(xs)
    record = None if case.library_gradient is None else (
        lambda v: factor * case.library_gradient(v))
    return Case(f"extreme/{label}/{case.name}", cost, case.point, factor * case.exact_gradient,
                case.complex_safe, "extreme", twin, record, f"{case.source}; scaled {label}")


def extreme_cases(base: list, quick=False):
    """Costs near 1e250 and near 1e-250: some cases scaled by 2^831 and 2^-831."""
    wanted = ["mgh/rosenbrock/x0", "mgh/wood/x0", "mgh/osborne_1/x0", "ml/logistic_l2/seed0",
              "special/erf/central", "steep/tanh_mlp/seed0"]
    if not quick:
        wanted += ["mgh/helical_valley_right/x0", "mgh/brown_badly_scaled/x0",
                   "mgh/biggs_exp6/minimiser0", "ml/softmax_cross_entropy/seed0",
                   "special/gammaln/moderate", "steep/cauchit/point0"]
    by_name = {c.name: c for c in base}
    for name in wanted:
        yield scaled(by_name[name], TWO_831, "times_2^831")
        yield scaled(by_name[name], 1 / TWO_831, "times_2^-831")


FAMILIES = (mgh_cases, ml_loss_cases, special_function_cases, statsmodels_cases, sklearn_cases,
            steep_cases, argument_scale_cases)


@functools.lru_cache(maxsize=None)
def _build(quick: bool) -> tuple:
    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for family in FAMILIES:
            out.extend(family(quick))
        out.extend(extreme_cases(out, quick))
    return tuple(out)


def cases(quick=False):
    """Yield the corpus's Cases (built once per process and kept)."""
    yield from _build(bool(quick))


# --- measurement ---------------------------------------------------------------------------------
@dataclass
class Miss:
    name: str
    coordinate: int
    error: float         # |numeric - exact|
    estimate: float      # the row's error_estimate
    ratio: float         # error / estimate
    numeric: float
    exact: float
    verdict: str


def measure_case(case: Case, method: str):
    """The report's rows for one case: list of (coordinate, numeric, estimate, verdict),
    and the method that ran (auto resolves to one)."""
    exact = case.exact_gradient
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        report = gk.compare_gradient(case.cost, case.point.copy(),
                                     gradient=lambda _x: exact.copy(), method=method)
    rows = {row.flat_index: row for row in report.rows}
    out = []
    for i in range(case.size):
        row = rows.get(i)
        if row is None:      # no row for this coordinate: counted as a miss
            out.append((i, math.nan, math.nan, "missing"))
        else:
            out.append((i, row.numeric, row.error_estimate, row.verdict))
    return out, report.method


def coverage(method: str, quick: bool = False, worst: int = 10) -> dict:
    """How often |numeric - exact| <= error_estimate holds for `method` over the corpus.

    Returns total coordinates, covered count, fraction, the `worst` misses (largest
    ratio |numeric - exact| / error_estimate first), false alarms (rows whose verdict is
    not 'agree', though the gradient given is exact) with their verdicts, the cases
    skipped (complex-step on costs that are not complex-safe), and for 'auto' how often
    it chose each method.
    """
    start = time.perf_counter()
    total = covered = skipped = 0
    misses, alarms = [], []
    verdicts, chosen = Counter(), Counter()
    for case in cases(quick):
        if method == "complex-step" and not case.complex_safe:
            skipped += case.size
            continue
        rows, used = measure_case(case, method)
        chosen[used] += 1
        for i, numeric, estimate, verdict in rows:
            exact = float(case.exact_gradient[i])
            error = abs(numeric - exact)
            total += 1
            verdicts[verdict] += 1
            if error <= estimate:     # False for NaN: a missing or non-finite row is a miss
                covered += 1
            else:
                ratio = error / estimate if estimate > 0 else math.inf
                misses.append(Miss(case.name, i, error, estimate,
                                   ratio if not math.isnan(ratio) else math.inf,
                                   numeric, exact, verdict))
            if verdict != "agree":
                alarms.append((case.name, i, verdict))
    misses.sort(key=lambda m: -m.ratio)
    return {"method": method, "quick": quick, "total": total, "covered": covered,
            "fraction": covered / total if total else math.nan,
            "misses": misses[:worst], "miss_count": len(misses),
            "miss_cases": Counter(m.name for m in misses),
            "false_alarms": len(alarms), "alarms": alarms, "verdicts": dict(verdicts),
            "skipped": skipped, "chosen": dict(chosen),
            "seconds": time.perf_counter() - start}
