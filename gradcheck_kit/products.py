"""Derivatives along directions, and checks of the products that code hands over.

Newton-type methods, implicit layers and forward-mode code do not supply a
gradient but a product: J v, u^T J, or H v.  A full Jacobian costs n
evaluations per output; along a random direction v a product is checked with
four.  This module holds

- the directional stencil: f(x + t v) at t = -h, -h/2, h/2, h (and the value at
  t = 0, which the caller has), combined by Richardson extrapolation, with a
  truncation estimate from the two steps and a rounding term from the noise
  seen on the same five points;  `judge_along` turns it into a verdict, with a
  shorter and a longer step tried before a mismatch is believed;
- `compare_jvp`, `compare_vjp`, `compare_hvp`: one report row per random probe,
  in the GradientReport of the other checks.

The gradient monitor (monitor.py) uses the same stencil along its optimizer's
trajectory.  Sources of the formulas are named where they are used.
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field

import numpy as np

from .errors import CheckInputError
from .frameworks import framework_of
from .report import GradientReport, Row, render_text
from .tree import assemble, coordinate_name, flatten, flatten_like, rebuild

# Stencil offsets in units of the step h, and the Richardson weights (times 1/h) on the
# values there: D(h) = (f(h) - f(-h)) / 2h and D(h/2) = (f(h/2) - f(-h/2)) / h are central
# differences with error c h^2 + O(h^4), so (4 D(h/2) - D(h)) / 3 cancels the h^2 term
# (Richardson extrapolation: Burden & Faires, Numerical Analysis, 9th ed., section 4.2).
OFFSETS = (-1.0, -0.5, 0.5, 1.0)
WEIGHTS = np.array([1 / 6, -4 / 3, 4 / 3, -1 / 6])
# D(h) - D(h/2) = 3/4 c h^2, so the error of D(h/2) is |D(h) - D(h/2)| / 3 (same source);
# the extrapolated value is better still.  Its error is taken as |D(h) - D(h/2)|, three
# times that estimate, as a margin for the estimate's own error (common practice).
TRUNCATION_MARGIN = 3.0
# Rounding: each value may be off by NOISE_SPREAD standard deviations of the cost's noise,
# and the weights sum to 3 / h in absolute value (worst case of the four errors adding up).
NOISE_SPREAD = 3.0
WEIGHT_SUM = 3.0
# Noise from the five equally spaced values: their fourth difference has variance
# 70 sigma^2 for independent noise of deviation sigma (1 + 16 + 36 + 16 + 1 = 70; the
# difference table of More & Wild, SIAM J. Sci. Comput. 33(3), 2011), and a smooth part
# (h/2)^4 f'''' that is negligible at these steps.
FOURTH_DIFFERENCE = np.array([1.0, -4.0, 6.0, -4.0, 1.0])
FOURTH_DIFFERENCE_VARIANCE = 70.0
VALUE_ROUNDING = 8.0      # values carry at least 8 eps of their size (the engine's margin)
# A mismatch is tried again with a step this much shorter (a kink within the first step
# upsets both differences) and this much longer (noise underestimated from one line); only
# a mismatch at all three steps is believed.
SHORTER_STEP = 1 / 16
LONGER_STEP = 8.0
# The analytic value is computed in floating point too: it may be off by this many of
# the cost's epsilons times its terms (the project's agreement rule, README "How a verdict
# is decided"), at most AGREEMENT_CAP of them.
ANALYTIC_EPSILONS = 1000.0
AGREEMENT_CAP = 1e-3
UNDECIDED_FRACTION = 0.5  # an error estimate this large next to the values decides nothing
DEFAULT_PROBES = 3

FAILING = ("disagree", "non-finite", "error")
_SEVERITY = ("disagree", "non-finite", "error", "kink", "noisy", "agree")


def step_for(eps_f: float) -> float:
    """The first step of the directional stencil, as a fraction of the scale.

    The central difference's step near eps^(1/3) (Nocedal & Wright, Numerical
    Optimization, 2nd ed., section 8.1), with the constant 64 that balances this
    stencil's two error terms, 9 sigma / h against |D(h) - D(h/2)| ~ h^2 |f'''| / 8,
    rounded down to a power of two.

    Parameters
    ----------
    eps_f : float
        Relative precision of the function's values (machine epsilon or noise).

    Returns
    -------
    float

    Examples
    --------
    >>> step_for(2.0 ** -52) == 2.0 ** -16
    True
    """
    return float(2.0 ** math.floor(math.log2((64 * eps_f) ** (1 / 3))))


def random_direction(rng: np.random.Generator, base: np.ndarray) -> np.ndarray:
    """A random direction whose entries are scaled like their coordinates.

    Gaussian entries times max(|x_i|, 1) (the project's scale of a coordinate),
    normalised so that the direction has length 1 in scaled units.

    Parameters
    ----------
    rng : numpy.random.Generator
    base : ndarray
        The point, flat.

    Returns
    -------
    ndarray

    Examples
    --------
    >>> v = random_direction(np.random.default_rng(0), np.array([0.5, 100.0]))
    >>> bool(np.isclose(np.linalg.norm(v / [1.0, 100.0]), 1.0))
    True
    """
    z = rng.standard_normal(base.size)
    norm = float(np.linalg.norm(z))
    if norm == 0.0:
        z, norm = np.ones(base.size), math.sqrt(base.size)
    scale = np.where(np.isfinite(base), np.maximum(np.abs(base), 1.0), 1.0)
    return scale * z / norm


@dataclass
class LineProbe:
    """The stencil along one direction at one step; arrays have one entry per output."""
    step: float
    values: np.ndarray          # (5, m): at -h, -h/2, 0, h/2, h
    derivative: np.ndarray
    truncation: np.ndarray
    noise: np.ndarray           # standard deviation of one value, per output
    rounding: np.ndarray
    failures: list              # messages of the points where the function raised

    @property
    def error(self) -> np.ndarray:
        return self.truncation + self.rounding

    @property
    def finite(self) -> np.ndarray:
        return np.isfinite(self.values).all(axis=0)


def probe_line(along, center: np.ndarray, h: float, eps_f: float, extra_error=None) -> LineProbe:
    """Evaluate `along(t)` at the four offsets and combine the values.

    `along(t)` returns the m outputs at x + t v; `center` holds them at t = 0.
    `extra_error(h)` may add an error per output (rounding of the points' inputs).
    """
    rows, failures = [], []
    for t in OFFSETS:
        try:
            rows.append(np.asarray(along(t * h), dtype=float).reshape(center.shape))
        except ProbeError as exc:
            rows.append(np.full(center.shape, np.nan))
            failures.append(str(exc))
    values = np.vstack([rows[0], rows[1], center, rows[2], rows[3]])
    with np.errstate(all="ignore"):
        d_long = (values[4] - values[0]) / (2 * h)
        d_short = (values[3] - values[1]) / h
        derivative = (np.array(WEIGHTS) @ values[[0, 1, 3, 4]]) / h
        truncation = TRUNCATION_MARGIN * np.abs(d_short - d_long) / 3
        seen = np.abs(FOURTH_DIFFERENCE @ values) / math.sqrt(FOURTH_DIFFERENCE_VARIANCE)
        noise = np.maximum(seen, VALUE_ROUNDING * eps_f * np.max(np.abs(values), axis=0))
        rounding = NOISE_SPREAD * WEIGHT_SUM * noise / h
    if extra_error is not None:
        rounding = rounding + extra_error(h)
    return LineProbe(h, values, derivative, truncation, noise, rounding, failures)


class ProbeError(Exception):
    """The function raised (or returned something unusable) at a stencil point."""


@dataclass
class Judgement:
    """The verdict along one direction, and the numbers it rests on."""
    verdict: str
    analytic: np.ndarray
    numeric: np.ndarray
    allowed: np.ndarray          # the allowed difference per output
    error_estimate: np.ndarray   # the numeric value's own error estimate
    verdicts: np.ndarray         # per output
    worst: int                   # output that decided (largest difference over allowance)
    step: float
    steps: list                  # every step tried
    detail: str = ""
    noise: float = 0.0
    evaluations: int = 0
    probes: list = field(default_factory=list, repr=False)


def _allowance(analytic, terms, eps_f):
    fraction = min(ANALYTIC_EPSILONS * eps_f, AGREEMENT_CAP)
    return fraction * (np.abs(analytic) + terms)


def _close(analytic, probe: LineProbe, allowance, rtol, atol):
    n = probe.derivative
    with np.errstate(invalid="ignore"):
        if rtol is None and atol is None:
            limit = probe.error + allowance
        else:
            limit = (atol or 0.0) + (rtol or 0.0) * np.abs(n)
        return np.abs(analytic - n) <= limit, limit


def _one_sided(probe: LineProbe):
    """Slopes on each side of t = 0 at steps s/2 and s, extrapolated (first-order
    Richardson, Burden & Faires section 4.2): (right, left, right error, left error)."""
    v, s = probe.values, probe.step
    with np.errstate(all="ignore"):
        r1, r2 = (v[4] - v[2]) / s, (v[3] - v[2]) / (s / 2)
        l1, l2 = (v[2] - v[0]) / s, (v[2] - v[1]) / (s / 2)
        # weights (4, -1, -3) / s on the values: their absolute sum is 8 / s
        rounding = NOISE_SPREAD * 8 * probe.noise / s
        return 2 * r2 - r1, 2 * l2 - l1, np.abs(r2 - r1) + rounding, np.abs(l2 - l1) + rounding


def judge_along(along, center, analytic, h, *, terms, eps_f, rtol=None, atol=None,
                extra_error=None) -> Judgement:
    """Compare analytic directional derivatives with the stencil along one direction.

    Parameters
    ----------
    along : callable
        t -> the m outputs at x + t v (raises ProbeError where they cannot be had).
    center : ndarray
        The m outputs at x.
    analytic : ndarray
        The m analytic directional derivatives (g . v, J v, H v, ...).
    h : float
        The first step.
    terms : float or ndarray
        Size of the terms the analytic values are summed from (for their rounding).
    eps_f : float
        Relative precision of the outputs.
    rtol, atol : float or None
        numpy's rule |a - n| <= atol + rtol |n| instead of the error estimate.
    extra_error : callable or None
        h -> extra error per output (rounding of the points' inputs).

    Returns
    -------
    Judgement
        verdict "agree", "disagree", "kink", "noisy", "non-finite" or "error".

    Examples
    --------
    >>> import numpy as np
    >>> j = judge_along(lambda t: np.array([np.sin(0.3 + t)]), np.array([np.sin(0.3)]),
    ...                 np.array([np.cos(0.3)]), 2.0 ** -15, terms=1.0, eps_f=2.0 ** -52)
    >>> j.verdict
    'agree'
    """
    analytic = np.asarray(analytic, dtype=float).reshape(center.shape)
    allowance = _allowance(analytic, terms, eps_f)
    first = probe_line(along, center, h, eps_f, extra_error)
    probes = [first]
    ok, _ = _close(analytic, first, allowance, rtol, atol)
    ok &= first.finite
    if not ok.all():
        for factor in (SHORTER_STEP, LONGER_STEP):
            other = probe_line(along, center, h * factor, eps_f, extra_error)
            probes.append(other)
            agree, _ = _close(analytic, other, allowance, rtol, atol)
            ok |= agree & other.finite
    verdicts = np.where(ok, "agree", "disagree").astype(object)
    finite_a = np.isfinite(analytic)
    kink_found = np.zeros(center.shape, dtype=bool)
    if not ok.all() and len(probes) > 1:
        right, left, err_r, err_l = _one_sided(probes[1])
        slack = err_r + err_l + allowance
        with np.errstate(invalid="ignore"):
            kink_found = (np.abs(right - left) > err_r + err_l) & \
                (analytic >= np.minimum(left, right) - slack) & \
                (analytic <= np.maximum(left, right) + slack)
        verdicts[~ok & kink_found] = "kink"
        nowhere = ~np.any([p.finite for p in probes], axis=0) & ~ok
        raised = bool(any(p.failures for p in probes))
        verdicts[nowhere] = "error" if raised else "non-finite"
    verdicts[~finite_a] = "non-finite"
    # The probe whose numbers are shown: the first, unless a later one decided agreement.
    chosen = first
    if (verdicts != "disagree").all():
        ratios = []
        for p in probes:
            agree, limit = _close(analytic, p, allowance, rtol, atol)
            with np.errstate(all="ignore"):
                r = np.where(p.finite, np.abs(analytic - p.derivative) / np.maximum(limit, 1e-300),
                             np.inf)
            ratios.append(float(np.max(r, initial=0.0)))
        chosen = probes[int(np.argmin(ratios))]
    _, limit = _close(analytic, chosen, allowance, rtol, atol)
    with np.errstate(all="ignore"):
        over = np.abs(analytic - chosen.derivative) / np.maximum(limit, 1e-300)
    over = np.where(np.isfinite(over), over, np.inf)
    order = sorted(range(center.size), key=lambda i: (_SEVERITY.index(verdicts.flat[i]),
                                                       -over.flat[i]))
    worst = order[0] if order else 0
    verdict = min(verdicts.flat, key=_SEVERITY.index) if verdicts.size else "agree"
    detail = ""
    if verdict == "agree" and chosen is not first:
        detail = (f"agreed at step {chosen.step:.3g} after a mismatch at step {h:.3g} "
                  "(a kink or fast curvature within the first step)")
    if verdict == "agree" and rtol is None and atol is None:
        size = float(np.max(np.maximum(np.abs(analytic), np.abs(chosen.derivative)), initial=0.0))
        if float(np.max(chosen.error, initial=0.0)) >= UNDECIDED_FRACTION * size:
            verdict = "noisy"
            detail = ("the directional derivative is not larger than its error estimate "
                      "(a stationary point, or a noisy function): nothing to decide")
    if verdict == "kink":
        detail = ("the function has two one-sided slopes here and the analytic value lies "
                  "between them")
    if verdict in ("error", "non-finite") and not finite_a.all():
        detail = "the analytic values are not finite"
    elif verdict == "error":
        detail = next(m for p in probes for m in p.failures)
    elif verdict == "non-finite":
        detail = "the function is not finite at the stencil points, even at the shorter step"
    if verdict == "disagree":
        detail = (f"disagrees at steps {', '.join(f'{p.step:.3g}' for p in probes)}")
    return Judgement(verdict, analytic, chosen.derivative, limit, chosen.error, verdicts, worst,
                     chosen.step, [p.step for p in probes], detail,
                     float(np.max(chosen.noise, initial=0.0)), 4 * len(probes), probes)


# --- the product checks --------------------------------------------------------------

def _check_count(value, name):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral) or value < 1:
        raise CheckInputError(f"{name}: expected an int >= 1, got {value!r}")
    return int(value)


def check_seed(seed, name="seed"):
    """None or an int >= 0, else a CheckInputError naming `name`.

    Examples
    --------
    >>> check_seed(3)
    3
    """
    if seed is None:
        return None
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, numbers.Integral) or seed < 0:
        raise CheckInputError(f"{name}: expected None or an int >= 0, got {seed!r}")
    return int(seed)


def check_tolerance(value, name):
    """None or a finite number >= 0, else a CheckInputError naming `name`.

    Examples
    --------
    >>> check_tolerance(1e-6, "rtol")
    1e-06
    """
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real) or \
            not math.isfinite(value) or value < 0:
        raise CheckInputError(f"{name}: expected None or a finite number >= 0, got {value!r}")
    return float(value)


def _traced(vector, layout):
    """rebuild() for a vector autograd traces: slices and reshapes only."""
    import autograd.numpy as anp

    leaves = []
    for leaf in layout.leaves:
        piece = vector[leaf.offset:leaf.offset + leaf.size]
        leaves.append(anp.reshape(piece, leaf.shape) if leaf.shape else piece[0])
    return assemble(layout.skeleton, leaves)


class _Outputs:
    """Flattening of a function's outputs: an array, a number, or a dict / list / tuple nest."""

    def __init__(self, first, what="fun"):
        self.what = what
        self.tree = isinstance(first, (dict, list, tuple))
        if self.tree:
            _, self.layout = flatten(_as_float_tree(first), "output")
            self.shape = None
            self.size = self.layout.size
        else:
            self.layout = None
            self.shape = np.shape(first)
            self.size = int(np.prod(self.shape)) if self.shape else 1

    def flat(self, out, what, shape_name="fun's output") -> np.ndarray:
        try:
            if self.tree:
                if isinstance(out, np.ndarray) and out.shape == (self.size,):
                    return out.astype(float)     # already flat, in the outputs' order
                return flatten_like(out, self.layout, what)
            array = np.asarray(out)
        except CheckInputError:
            raise
        except Exception as exc:
            raise CheckInputError(f"{what}: returned {type(out).__name__}; expected numbers "
                                  f"shaped like {shape_name}") from exc
        if not (np.issubdtype(array.dtype, np.number) or array.dtype == np.bool_):
            raise CheckInputError(f"{what}: returned {array.dtype} values; expected numbers")
        if np.iscomplexobj(array):
            raise CheckInputError(f"{what}: returned complex values; expected real numbers")
        if array.shape != self.shape and array.shape != (self.size,):
            raise CheckInputError(f"{what}: expected shape {self.shape} (the shape of "
                                  f"{shape_name}), got shape {array.shape}")
        return array.astype(float).ravel()

    def names(self) -> list:
        if self.tree:
            return [coordinate_name(self.layout, i) for i in range(self.size)]
        if not self.shape:
            return ["y"]
        return [f"y[{', '.join(map(str, np.unravel_index(i, self.shape)))}]"
                for i in range(self.size)]

    def unflatten(self, vector):
        if self.tree:
            return rebuild(vector.copy(), self.layout)
        return vector.copy().reshape(self.shape) if self.shape else float(vector[0])


def _as_float_tree(t):
    if isinstance(t, dict):
        return {k: _as_float_tree(v) for k, v in t.items()}
    if isinstance(t, (list, tuple)):
        return [_as_float_tree(v) for v in t]
    return np.asarray(t, dtype=float)


class _Setup:
    """The point, its flat form and a caller that never lets the function see our arrays."""

    def __init__(self, fun, params, what):
        if not callable(fun):
            raise CheckInputError(f"{what}: expected a callable taking params, got "
                                  f"{type(fun).__name__}")
        self.fun, self.what = fun, what
        self.base, self.layout = flatten(params)
        self.low_precision = [leaf.name for leaf in self.layout.leaves
                              if leaf.dtype != np.float64]
        self.calls = 0

    def params(self):
        return rebuild(self.base.copy(), self.layout)

    def point(self, vector):
        """params at a flat vector, leaves in float64 (x + t v is not exact in float32)."""
        values = [vector[leaf.offset:leaf.offset + leaf.size].copy().reshape(leaf.shape)
                  if leaf.kind == "array" else float(vector[leaf.offset])
                  for leaf in self.layout.leaves]
        return assemble(self.layout.skeleton, values)

    def call(self, vector, label):
        self.calls += 1
        try:
            return self.fun(self.point(vector))
        except Exception as exc:
            raise ProbeError(f"{self.what} raised {type(exc).__name__} {label}: {exc}") from exc

    def at_base(self):
        self.calls += 1
        try:
            return self.fun(self.params())
        except Exception as exc:
            raise CheckInputError(f"{self.what} raised {type(exc).__name__} at the base point: "
                                  f"{exc}") from exc


def _call_product(product, name, args, k):
    try:
        return product(*args)
    except Exception as exc:
        raise CheckInputError(f"{name} raised {type(exc).__name__} at probe {k + 1}: {exc}") \
            from exc


def _output_eps(values) -> float:
    dtype = np.asarray(values).dtype
    return float(np.finfo(dtype).eps) if np.issubdtype(dtype, np.floating) else \
        float(np.finfo(np.float64).eps)


def _finite_base(values, names, what):
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        shown = ", ".join(f"{names[i]} = {values[i]}" for i in bad[:3])
        raise CheckInputError(f"{what} returned non-finite values at the base point ({shown}"
                              + (" ..." if bad.size > 3 else "") + "); expected finite numbers")


@dataclass
class ProductReport(GradientReport):
    """A GradientReport whose rows are probes (random directions), not coordinates.

    Attributes
    ----------
    rows : list of Row
        One per probe direction: the product given against the numeric one, along it.
    passed, hints, notes, problems, evaluations, method
        As for GradientReport.
    """

    def to_text(self, max_rows: int = 10) -> str:
        body = render_text(self, max_rows).split("\n")[1:]
        bad = sum(1 for r in self.rows if r.failing)
        head = "PASS" if self.passed else "FAIL"
        counts = ", ".join(f"{n} {v}" for v, n in sorted(self.counts.items()))
        worst = self.worst_relative_error
        worst_text = "-" if worst is None else f"{worst:.1e}"
        line = (f"{head} {self.title}: {bad} of {len(self.rows)} probes fail ({counts}); worst "
                f"relative error {worst_text}; method {self.method}; "
                f"{self.evaluations} evaluations")
        return "\n".join([line] + body)

    def __str__(self) -> str:
        return self.to_text()


def _relative(a, n):
    with np.errstate(all="ignore"):
        size = max(abs(a), abs(n))
        return 0.0 if size == 0 else (abs(a - n) / size if math.isfinite(size) else math.inf)


def _row(k, label, judgement: Judgement, names, bad_count, what):
    i = judgement.worst
    a, n = float(judgement.analytic.flat[i]), float(judgement.numeric.flat[i])
    where = f" at {names[i]}" if len(names) > 1 else ""
    detail = judgement.detail
    if len(names) > 1 and bad_count:
        detail = (f"{bad_count} of {len(names)} {what} fail, worst {names[i]}; " + detail)
    name = f"u{k + 1} J v{k + 1}" if label == "uJv" else f"{label}{k + 1}{where}"
    return Row(name, label, (k,), k, a, n, abs(a - n),
               _relative(a, n), float(judgement.error_estimate.flat[i]), judgement.verdict,
               detail)


def _ignores_argument(analytic_values, numeric_values, errors, name, argument,
                      arguments=None) -> list:
    """A product that returns the same values for different arguments ignores them.

    arguments: the arguments given, where they may repeat (u of a one-output function is
    always the same unit number): the same values for the same argument are expected."""
    if len(analytic_values) < 2:
        return []
    if arguments is not None and all(np.array_equal(arguments[0], x) for x in arguments[1:]):
        return []
    first = analytic_values[0]
    if not all(np.array_equal(first, a) for a in analytic_values[1:]):
        return []
    spread = max(float(np.max(np.abs(n - numeric_values[0]) - e - errors[0], initial=0.0))
                 for n, e in zip(numeric_values[1:], errors[1:]))
    if spread <= 0:
        return []
    return [f"{name} returned the same values for {len(analytic_values)} different {argument}: "
            f"it ignores its argument {argument} (the product must change with {argument}), "
            f"while the function's differences along them differ"]


def _finish(rows, evaluations, total, title, notes, problems, extra) -> ProductReport:
    return ProductReport(rows=rows, method="richardson along directions",
                         evaluations=evaluations, total=total, notes=notes, problems=problems,
                         title=title, extra=extra)


def _start(fun, params, what, probes, seed, rtol, atol):
    probes = _check_count(probes, "probes")
    seed = check_seed(seed)
    rtol, atol = check_tolerance(rtol, "rtol"), check_tolerance(atol, "atol")
    setup = _Setup(fun, params, what)
    return setup, probes, np.random.default_rng(seed), rtol, atol


def _determinism(setup, first, outputs, again_out):
    again = outputs.flat(again_out, setup.what)
    size = np.maximum(np.abs(first), np.abs(again))
    if np.all(np.abs(first - again) <= 10 * np.finfo(float).eps * size):
        return []
    return [f"{setup.what} is not deterministic: two calls at the same parameters returned "
            "different values; seed its random generator and switch off sampling before "
            "checking its products"]


def _precision_note(setup) -> list:
    if not setup.low_precision:
        return []
    return [f"parameters {', '.join(setup.low_precision)} are stored in lower precision: the "
            "points along each direction are evaluated with float64 leaves, which hold "
            "x + t v exactly"]


def _vector_check_start(fun, params, probes, seed, rtol, atol, given, default, name,
                        argument) -> tuple:
    """What compare_jvp and compare_vjp both do before their probes: check the options,
    call fun at the base point (twice, for determinism), and pick the product (the user's
    or autograd's).  Returns (setup, probes, rng, rtol, atol, outputs, center, names,
    problems, eps_f, product)."""
    setup, probes, rng, rtol, atol = _start(fun, params, "fun", probes, seed, rtol, atol)
    y0 = setup.at_base()
    outputs = _Outputs(y0)
    center = outputs.flat(y0, "fun")
    names = outputs.names()
    _finite_base(center, names, "fun")
    problems = _determinism(setup, center, outputs, setup.at_base())
    eps_f = max(_output_eps(np.asarray(x)) for x in _leaf_values(y0))
    product = given if given is not None else default(fun, setup)
    if not callable(product):
        raise CheckInputError(f"{name}: expected a function {name}(params, {argument}) or "
                              f"None, got {type(product).__name__}")
    return setup, probes, rng, rtol, atol, outputs, center, names, problems, eps_f, product


def compare_jvp(fun, params, jvp=None, *, probes=DEFAULT_PROBES, seed=None, rtol=None,
                atol=None) -> ProductReport:
    """Check a Jacobian-vector product J v against differences of `fun` along v.

    Parameters
    ----------
    fun : callable
        params -> an array, a number or a dict / list / tuple nest of those.
    params : array, float, or a dict / list / tuple nest of those
        Or torch tensors, a torch.nn.Module, JAX arrays (or nests of them): then
        fun and jvp get framework values (v too; a module's v is a dict by
        parameter name) and the check runs on float64 copies.
    jvp : callable or None
        jvp(params, v) -> J v, shaped like fun's output; v is shaped like params.
        None: autograd's forward product of `fun` (torch.autograd's or jax.jvp's
        for framework values).
    probes : int
        Random directions v tried (one report row each); 4 evaluations each, and 8
        more for a direction that disagrees.
    seed : int or None
        Seed of the directions.
    rtol, atol : float or None
        numpy's rule |a - n| <= atol + rtol |n| instead of the error estimates.

    Returns
    -------
    ProductReport
        A GradientReport with one row per probe (the worst output named), its
        problems saying when the product ignores v.

    Raises
    ------
    CheckInputError
        fun or jvp fails at the base point, returns the wrong shape, or fun's
        values there are not finite.

    Examples
    --------
    >>> import numpy as np
    >>> A = np.array([[1.0, 2.0], [0.5, -1.0]])
    >>> compare_jvp(lambda x: np.tanh(A @ x), np.array([0.2, 0.1]),
    ...             lambda x, v: (1 - np.tanh(A @ x) ** 2) * (A @ v), seed=0).passed
    True
    """
    kind = framework_of(params)
    if kind is not None:
        return _on_framework(compare_jvp, "jvp", kind, fun, params, jvp,
                             dict(probes=probes, seed=seed, rtol=rtol, atol=atol))
    setup, probes, rng, rtol, atol, outputs, center, names, problems, eps_f, product = \
        _vector_check_start(fun, params, probes, seed, rtol, atol, jvp, _autograd_jvp, "jvp", "v")
    rows, analytic_all, numeric_all, errors, worst = [], [], [], [], []
    h = step_for(eps_f)
    for k in range(probes):
        given = rebuild(random_direction(rng, setup.base), setup.layout)
        # the direction as the parameters' dtypes hold it (float32 rounds it): the
        # differences step along exactly the v that jvp is given
        v = np.asarray(flatten_like(given, setup.layout, "v"), dtype=np.float64)
        arguments = (setup.params(), given)
        a = outputs.flat(_call_product(product, "jvp", arguments, k), "jvp", "fun's output")
        terms = np.max(np.abs(a), initial=0.0)

        def along(t, v=v, k=k):
            return outputs.flat(setup.call(setup.base + t * v, f"at probe {k + 1}"), "fun")
        j = judge_along(along, center, a, h, terms=terms, eps_f=eps_f, rtol=rtol, atol=atol)
        analytic_all.append(a)
        numeric_all.append(j.numeric)
        errors.append(j.error_estimate)
        worst.append(int(j.worst))
        bad = int(np.isin(j.verdicts, FAILING).sum())
        rows.append(_row(k, "v", j, names, bad, "outputs"))
    problems += _ignores_argument(analytic_all, numeric_all, errors, "jvp", "v")
    return _finish(rows, setup.calls, probes, "jacobian-vector product check",
                   _precision_note(setup), problems,
                   {"probes": probes, "outputs": outputs.size, "inputs": setup.base.size,
                    "step": h, "worst_outputs": worst})


def compare_vjp(fun, params, vjp=None, *, probes=DEFAULT_PROBES, seed=None, rtol=None,
                atol=None) -> ProductReport:
    """Check a vector-Jacobian product u^T J through u^T J v both ways.

    For random u (shaped like fun's output) and v (shaped like params), the
    analytic (u^T J) . v is compared with the derivative of u . fun along v.

    Parameters
    ----------
    fun : callable
        params -> an array, a number or a dict / list / tuple nest of those.
    params : array, float, or a dict / list / tuple nest of those
        Or framework values, as in compare_jvp (u then reaches vjp as float64
        framework values).
    vjp : callable or None
        vjp(params, u) -> u^T J, shaped like params; u is shaped like fun's output.
        None: autograd's reverse product of `fun` (torch.autograd's, through any
        custom backward, or jax.vjp's for framework values).
    probes : int
        Random pairs (u, v) tried, one report row each.
    seed : int or None
    rtol, atol : float or None

    Returns
    -------
    ProductReport

    Raises
    ------
    CheckInputError
        As compare_jvp; the product must be shaped like params.

    Examples
    --------
    >>> import numpy as np
    >>> A = np.array([[1.0, 2.0], [0.5, -1.0], [3.0, 0.0]])
    >>> compare_vjp(lambda x: A @ x, np.array([0.2, 0.1]), lambda x, u: u @ A, seed=0).passed
    True
    """
    kind = framework_of(params)
    if kind is not None:
        return _on_framework(compare_vjp, "vjp", kind, fun, params, vjp,
                             dict(probes=probes, seed=seed, rtol=rtol, atol=atol))
    setup, probes, rng, rtol, atol, outputs, center_all, names, problems, eps_f, product = \
        _vector_check_start(fun, params, probes, seed, rtol, atol, vjp, _autograd_vjp, "vjp", "u")
    rows, analytic_all, numeric_all, errors, worst, given = [], [], [], [], [], []
    h = step_for(eps_f)
    for k in range(probes):
        u = rng.standard_normal(outputs.size)
        u /= max(float(np.linalg.norm(u)), 1e-300)
        given.append(u)
        v = random_direction(rng, setup.base)
        back = _call_product(product, "vjp", (setup.params(), outputs.unflatten(u)), k)
        uj = flatten_like(back, setup.layout, "vjp") if not _bare_size_one(setup, back) else \
            np.asarray(back, dtype=float).ravel()
        a = np.array([float(uj @ v)])
        terms = float(np.sum(np.abs(uj * v)))

        def along(t, u=u, v=v, k=k):
            return np.array([u @ outputs.flat(setup.call(setup.base + t * v,
                                                         f"at probe {k + 1}"), "fun")])
        center = np.array([float(u @ center_all)])
        j = judge_along(along, center, a, h, terms=terms, eps_f=eps_f, rtol=rtol, atol=atol)
        analytic_all.append(uj)
        numeric_all.append(j.numeric)
        errors.append(j.error_estimate)
        worst.append(int(j.worst))
        rows.append(_row(k, "uJv", j, ["u.v"], 0, "pairs"))
    problems += _ignores_argument(analytic_all, numeric_all, errors, "vjp", "u", given)
    return _finish(rows, setup.calls, probes, "vector-jacobian product check",
                   _precision_note(setup), problems,
                   {"probes": probes, "outputs": outputs.size, "inputs": setup.base.size,
                    "step": h, "worst_outputs": worst})


def _bare_size_one(setup, value) -> bool:
    return setup.layout.size == 1 and isinstance(value, (float, np.ndarray, np.floating)) and \
        np.size(value) == 1


def compare_hvp(cost, params, hvp=None, *, gradient=None, probes=DEFAULT_PROBES, seed=None,
                rtol=None, atol=None) -> ProductReport:
    """Check a Hessian-vector product H v against differences of the gradient along v.

    Parameters
    ----------
    cost : callable
        params -> a scalar.
    params : array, float, or a dict / list / tuple nest of those
        Or framework values, as in compare_jvp.
    hvp : callable or None
        hvp(params, v) -> H v, shaped like params; v is shaped like params.
        None: autograd's Hessian-vector product of `cost` (torch.autograd's
        double backward, or jax.jvp of jax.grad, for framework values).
    gradient : callable or None
        The gradient whose differences stand for H v; None: autograd's gradient
        of `cost`.  (Check it first: a wrong gradient makes a right H v disagree.)
    probes : int
        Random directions tried, one report row each; four gradient
        evaluations each, eight more for a direction that disagrees.
    seed : int or None
    rtol, atol : float or None

    Returns
    -------
    ProductReport
        Rows name the worst coordinate of each probe, e.g. 'v2 at W[1, 0]'.

    Raises
    ------
    CheckInputError
        The gradient or the product fails at the base point, has the wrong
        shape, or the gradient is not finite there.

    Examples
    --------
    >>> import numpy as np
    >>> A = np.array([[2.0, 1.0], [1.0, 3.0]])
    >>> compare_hvp(lambda x: 0.5 * x @ A @ x, np.array([0.2, -0.1]), lambda x, v: A @ v,
    ...             gradient=lambda x: A @ x, seed=0).passed
    True
    """
    if not callable(cost):
        raise CheckInputError(f"cost: expected a callable taking params, got "
                              f"{type(cost).__name__}")
    if gradient is not None and not callable(gradient):
        raise CheckInputError(f"gradient: expected a function of params or None, got "
                              f"{type(gradient).__name__}")
    kind = framework_of(params)
    if kind is not None:
        return _on_framework(compare_hvp, "hvp", kind, cost, params, hvp,
                             dict(probes=probes, seed=seed, rtol=rtol, atol=atol), gradient)
    probe_setup = _Setup(cost, params, "cost")
    grad_fun = gradient if gradient is not None else _autograd_gradient(cost, probe_setup)
    setup, probes, rng, rtol, atol = _start(grad_fun, params, "gradient", probes, seed, rtol,
                                            atol)
    g0 = setup.at_base()
    outputs = _GradientOutputs(setup)
    center = outputs.flat(g0, "gradient")
    names = [coordinate_name(setup.layout, i) for i in range(setup.base.size)]
    _finite_base(center, names, "gradient")
    problems = _determinism(setup, center, outputs, setup.at_base())
    eps_f = max(float(np.finfo(float).eps), *(_output_eps(np.asarray(x)) for x in
                                              _leaf_values(g0)))
    product = hvp if hvp is not None else _autograd_hvp(cost, setup)
    if not callable(product):
        raise CheckInputError(f"hvp: expected a function hvp(params, v) or None, got "
                              f"{type(product).__name__}")
    rows, analytic_all, numeric_all, errors, worst = [], [], [], [], []
    h = step_for(eps_f)
    for k in range(probes):
        v = random_direction(rng, setup.base)
        arguments = (setup.params(), rebuild(v.copy(), setup.layout))
        a = outputs.flat(_call_product(product, "hvp", arguments, k), "hvp")
        terms = np.max(np.abs(a), initial=0.0) + np.max(np.abs(center), initial=0.0)

        def along(t, v=v, k=k):
            return outputs.flat(setup.call(setup.base + t * v, f"at probe {k + 1}"), "gradient")
        j = judge_along(along, center, a, h, terms=terms, eps_f=eps_f, rtol=rtol, atol=atol)
        analytic_all.append(a)
        numeric_all.append(j.numeric)
        errors.append(j.error_estimate)
        worst.append(int(j.worst))
        bad = int(np.isin(j.verdicts, FAILING).sum())
        rows.append(_row(k, "v", j, names, bad, "coordinates"))
    problems += _ignores_argument(analytic_all, numeric_all, errors, "hvp", "v")
    return _finish(rows, setup.calls, probes, "hessian-vector product check",
                   _precision_note(setup), problems,
                   {"probes": probes, "inputs": setup.base.size, "step": h,
                    "gradient_evaluations": setup.calls, "worst_outputs": worst})


class _GradientOutputs:
    """Gradients and products shaped like params, flattened with the params' layout."""

    def __init__(self, setup):
        self.setup = setup

    def flat(self, value, what):
        if _bare_size_one(self.setup, value):
            return np.asarray(value, dtype=float).ravel()
        return flatten_like(value, self.setup.layout, what)


def _leaf_values(tree):
    if isinstance(tree, dict):
        return [x for v in tree.values() for x in _leaf_values(v)]
    if isinstance(tree, (list, tuple)):
        return [x for v in tree for x in _leaf_values(v)]
    return [tree]


def _flat_output(out):
    import autograd.numpy as anp
    if isinstance(out, (dict, list, tuple)):
        return anp.concatenate([anp.ravel(x) for x in _leaf_values(out)])
    return anp.ravel(out)


def _autograd_jvp(fun, setup):
    from autograd import make_jvp

    layout = setup.layout

    def product(params, v):
        base, _ = flatten(params)
        direction, _ = flatten(v, "v")
        try:
            return make_jvp(lambda x: _flat_output(fun(_traced(x, layout))))(base)(direction)[1]
        except Exception as exc:
            raise CheckInputError(f"jvp=None: autograd could not differentiate fun "
                                  f"({type(exc).__name__}: {exc}); pass jvp=") from exc
    return product


def _autograd_vjp(fun, setup):
    from autograd import make_vjp

    layout = setup.layout

    def product(params, u):
        base, _ = flatten(params)
        flat_u = np.ravel(np.asarray(_flat_output_numpy(u), dtype=float))
        try:
            back, _ = make_vjp(lambda x: _flat_output(fun(_traced(x, layout))))(base)
            return rebuild(np.asarray(back(flat_u), dtype=float), layout)
        except Exception as exc:
            raise CheckInputError(f"vjp=None: autograd could not differentiate fun "
                                  f"({type(exc).__name__}: {exc}); pass vjp=") from exc
    return product


def _flat_output_numpy(out):
    if isinstance(out, (dict, list, tuple)):
        return np.concatenate([np.ravel(x) for x in _leaf_values(out)])
    return np.ravel(out)


def _autograd_gradient(cost, setup):
    import autograd

    layout = setup.layout

    def gradient(params):
        base, _ = flatten(params)
        try:
            return rebuild(np.asarray(autograd.grad(lambda x: cost(_traced(x, layout)))(base),
                                      dtype=float), layout)
        except Exception as exc:
            raise CheckInputError(f"gradient=None: autograd could not differentiate the cost "
                                  f"({type(exc).__name__}: {exc}); pass gradient=") from exc
    return gradient


def _autograd_hvp(cost, setup):
    from autograd import hessian_vector_product

    layout = setup.layout

    def product(params, v):
        base, _ = flatten(params)
        direction, _ = flatten(v, "v")
        try:
            value = hessian_vector_product(lambda x: cost(_traced(x, layout)))(base, direction)
        except Exception as exc:
            raise CheckInputError(f"hvp=None: autograd could not differentiate the cost "
                                  f"({type(exc).__name__}: {exc}); pass hvp=") from exc
        return rebuild(np.asarray(value, dtype=float), layout)
    return product


# --- framework values: PyTorch tensors / modules and JAX arrays ------------------------------
#
# The engine above works on numpy trees.  A check whose params hold torch or JAX values runs
# on float64 numpy copies (frameworks.TorchBridge / JaxBridge, the bridges of the public
# entries): the function and the product are called with framework values built from each
# numpy point, a product's second argument (v, or u for a vjp) as framework values too, and
# what they return is read back as numpy.  `takes_framework_values` does not fit here: it
# treats the third argument as a gradient of params alone (called with one argument, or a
# value) and a non-Jacobian entry as a scalar cost, while a product takes two arguments and
# jvp / vjp functions return vectors.

def _on_framework(entry, which, kind, fun, params, product, options, gradient=None):
    """Run `entry` (compare_jvp / compare_vjp / compare_hvp) on numpy views of framework
    values; the caller's tensors and modules are only read (a ModuleGuard sets back what a
    function changed in place, with a note)."""
    from .frameworks import ModuleGuard

    what = "cost" if which == "hvp" else "fun"
    if not callable(fun):
        raise CheckInputError(f"{what}: expected a callable taking params, got "
                              f"{type(fun).__name__}")
    if product is not None and not callable(product):
        raise CheckInputError(f"{which}: expected a function {which}(params, "
                              f"{'u' if which == 'vjp' else 'v'}) or None, got "
                              f"{type(product).__name__}")
    if gradient is not None and not callable(gradient):
        raise CheckInputError(f"gradient: expected a function of params or None, got "
                              f"{type(gradient).__name__}")
    with ModuleGuard(params) as guard:
        view = _FrameworkView(kind, params, fun)
        numpy_product = view.default(which, fun) if product is None else \
            view.product(product, which)
        more = {"gradient": view.gradient(fun, gradient)} if which == "hvp" else {}
        report = entry(view.call_with(fun), view.params, numpy_product, **more, **options)
    notes = _framework_notes(view.bridge)
    if not view.bridge.widen:   # the engine's note on float64 leaves does not hold here
        report.notes = [n for n in report.notes if "are stored in lower precision" not in n]
    if product is None:
        notes.append(f"{which}=None: the product is {view.tool(which)}'s, through any custom "
                     "derivative rule the function uses")
    report.notes[:0] = notes + view.notes + list(view.bridge.notes) + guard.notes
    report.evaluations += view.probe_calls
    return report


def _framework_notes(bridge) -> list:
    from .frameworks import _listed

    notes = []
    if bridge.widened and bridge.widen:
        notes.append(f"{bridge.framework} values in lower precision ({_listed(bridge.widened)}) "
                     "were checked on float64 copies")
    elif not bridge.widen:
        notes.append("the points along each direction are rounded to the params' own dtypes "
                     "before each call")
    if bridge.narrowed:
        notes.append(f"bfloat16 values ({_listed(bridge.narrowed)}) were checked in float32")
    if bridge.on_devices:
        notes.append(f"params on {', '.join(sorted(bridge.on_devices))} were checked there")
    return notes


class _FrameworkView:
    """numpy callables standing for a user's framework function and product."""

    def __init__(self, kind, params, fun):
        from .frameworks import JaxBridge, TorchBridge

        self.kind, self.probe_calls, self.notes = kind, 0, []
        make = TorchBridge if kind == "torch" else JaxBridge
        self.bridge = make(params, widen=True)
        if self.bridge.widened and not self._runs(fun):
            # float32 data inside the function refuses float64 copies: check in the
            # params' own precision (as the other entries do), with a note
            self.bridge = make(params, widen=False)
            self.notes.append("the function fails on float64 copies of params, so it was "
                              "checked in the params' own precision, where agreement means "
                              "less; give its data the dtype of params for a float64 check")
        self.params = self.bridge.params      # numpy copies, the engine's tree

    def _runs(self, fun) -> bool:
        self.probe_calls += 1
        try:
            self._run(fun, self.bridge.params)
        except Exception:  # noqa: BLE001 - user code; the engine reports it if it stays
            return False
        return True

    def leaves(self, numpy_tree, requires_grad=False):
        """Framework leaves of a params-shaped numpy tree, in the working precision (the
        engine's points are float64; a check in own precision casts them back)."""
        bridge = self.bridge
        if self.kind == "torch":
            out = bridge.tensors(numpy_tree)
            if not bridge.widen:
                out = [t.to(d) if d is not None and t.is_floating_point() else t
                       for t, d in zip(out, bridge.own_dtypes)]
            return [t.detach().requires_grad_(True) if requires_grad else t for t in out]
        out = bridge.arrays(numpy_tree)
        if not bridge.widen:
            out = [a if d is None else a.astype(d) for a, d in zip(out, bridge.own_dtypes)]
        return out

    # calls ------------------------------------------------------------------------------
    def _x64(self):
        import contextlib

        if self.kind == "torch":
            return contextlib.nullcontext()
        from .frameworks import _x64
        return _x64(__import__("jax"))

    def _shaped_like_params(self, numpy_tree):
        """A params-shaped numpy tree (v) as framework values (a module's part a dict by
        parameter name), float64, on the params' devices."""
        from .frameworks import _rebuild_numpy

        return _rebuild_numpy(numpy_tree, self.leaves(numpy_tree))

    def _plain(self, numpy_tree):
        """Any numpy tree (u, shaped like the outputs) as float64 framework values."""
        from .frameworks import _rebuild_numpy
        from .tree import leaves_of

        if self.kind == "torch":
            torch = self.bridge.torch
            values = [torch.from_numpy(np.array(x, dtype=np.float64)) for x in
                      leaves_of(numpy_tree)]
        else:
            import jax.numpy as jnp
            values = [jnp.asarray(np.array(x, dtype=np.float64)) for x in leaves_of(numpy_tree)]
        return _rebuild_numpy(numpy_tree, values)

    def _run(self, fn, numpy_tree, rest=()):
        from .frameworks import _arrays, _settled

        with self._x64():
            if self.kind == "torch":
                out = self.bridge.run(fn, self.leaves(numpy_tree), rest)
            else:
                out = _settled(fn(self.bridge.assemble(self.leaves(numpy_tree)), *rest))
            return _arrays(out)

    def call_with(self, fun):
        def numpy_fun(numpy_tree):
            return self._run(fun, numpy_tree)
        numpy_fun.__name__ = getattr(fun, "__name__", "fun")
        return numpy_fun

    def product(self, product, which):
        def numpy_product(numpy_tree, second):
            with self._x64():
                other = self._plain(second) if which == "vjp" else \
                    self._shaped_like_params(second)
                return self._run(product, numpy_tree, (other,))
        return numpy_product

    def gradient(self, cost, gradient):
        from .frameworks import _arrays

        if gradient is None:
            return self.default("gradient", cost)

        def numpy_gradient(numpy_tree):
            with self._x64():
                leaves = self.leaves(numpy_tree, requires_grad=self.kind == "torch")
                if self.kind == "torch":
                    with self.bridge.torch.enable_grad():
                        return _arrays(self.bridge.run(gradient, leaves))
                return _arrays(gradient(self.bridge.assemble(leaves)))
        return numpy_gradient

    # the framework's own products -------------------------------------------------------------
    def tool(self, which) -> str:
        if self.kind == "torch":
            return "torch.autograd"
        return {"jvp": "jax.jvp", "vjp": "jax.vjp", "hvp": "jax.jvp of jax.grad",
                "gradient": "jax.grad"}[which]

    def default(self, which, fun):
        make = {("torch", "jvp"): _torch_jvp, ("torch", "vjp"): _torch_vjp,
                ("torch", "hvp"): _torch_hvp, ("torch", "gradient"): _torch_gradient,
                ("jax", "jvp"): _jax_jvp, ("jax", "vjp"): _jax_vjp, ("jax", "hvp"): _jax_hvp,
                ("jax", "gradient"): _jax_gradient}[(self.kind, which)]
        product = make(self, fun)
        what = "fun" if which in ("jvp", "vjp") else "the cost"

        def numpy_product(numpy_tree, *second):
            try:
                with self._x64():
                    return product(numpy_tree, *second)
            except CheckInputError:
                raise
            except Exception as exc:
                raise CheckInputError(f"{which}=None: {self.tool(which)} could not "
                                      f"differentiate {what} ({type(exc).__name__}: {exc}); "
                                      f"pass {which}=") from exc
        return numpy_product


def _torch_flat(torch, out):
    from .tree import leaves_of

    return torch.cat([torch.as_tensor(y).reshape(-1) for y in leaves_of(out)])


def _numpy_of(tensor, like):
    return np.zeros(np.shape(like)) if tensor is None else \
        np.asarray(tensor.detach().cpu().numpy(), dtype=np.float64)


def _torch_jvp(view, fun):
    bridge, torch = view.bridge, view.bridge.torch

    def product(numpy_tree, v):
        leaves, tangents = view.leaves(numpy_tree), view.leaves(v)

        def flat(*xs):
            return _torch_flat(torch, bridge.run(fun, list(xs)))
        with torch.enable_grad():   # the double-backward form: custom backward rules count
            _, out = torch.autograd.functional.jvp(flat, tuple(leaves), tuple(tangents))
        return _numpy_of(out, None)
    return product


def _torch_vjp(view, fun):
    from .frameworks import _rebuild_numpy

    bridge, torch = view.bridge, view.bridge.torch

    def product(numpy_tree, u):
        leaves = view.leaves(numpy_tree, requires_grad=True)
        with torch.enable_grad():
            out = _torch_flat(torch, bridge.run(fun, leaves))
            weights = torch.from_numpy(np.array(_flat_output_numpy(u), dtype=np.float64))
            grads = torch.autograd.grad(out, leaves, grad_outputs=weights.to(out.dtype),
                                        allow_unused=True) if out.requires_grad else \
                [None] * len(leaves)
        return _rebuild_numpy(numpy_tree, [_numpy_of(g, x) for g, x in
                                           zip(grads, _leaf_values(numpy_tree))])
    return product


def _torch_gradient(view, cost):
    """The gradient as the vjp of a scalar cost with u = 1 (through any custom backward)."""
    vjp = _torch_vjp(view, cost)
    return lambda numpy_tree: vjp(numpy_tree, 1.0)


def _torch_hvp(view, cost):
    from .frameworks import _rebuild_numpy

    bridge, torch = view.bridge, view.bridge.torch

    def product(numpy_tree, v):
        leaves, tangents = view.leaves(numpy_tree, requires_grad=True), view.leaves(v)
        hv = [None] * len(leaves)
        with torch.enable_grad():
            out = bridge.run(cost, leaves)
            grads = torch.autograd.grad(out.reshape(()), leaves, create_graph=True,
                                        allow_unused=True)
            pairs = [(g, t) for g, t in zip(grads, tangents) if g is not None and g.requires_grad]
            if pairs:   # d/dx of sum_i g_i . t_i is H t (H symmetric)
                hv = torch.autograd.grad([g for g, _ in pairs], leaves,
                                         grad_outputs=[t.to(g.dtype) for g, t in pairs],
                                         allow_unused=True)
        return _rebuild_numpy(numpy_tree, [_numpy_of(h, x) for h, x in
                                           zip(hv, _leaf_values(numpy_tree))])
    return product


def _jax_flat(bridge, fun):
    import jax.numpy as jnp

    from .tree import leaves_of

    return lambda xs: jnp.concatenate([jnp.ravel(y) for y in leaves_of(fun(bridge.assemble(xs)))])


def _jax_jvp(view, fun):
    import jax

    def product(numpy_tree, v):
        _, out = jax.jvp(_jax_flat(view.bridge, fun), (view.leaves(numpy_tree),),
                         (view.leaves(v),))
        return np.asarray(out, dtype=np.float64)
    return product


def _jax_vjp(view, fun):
    import jax
    import jax.numpy as jnp

    from .frameworks import _rebuild_numpy

    def product(numpy_tree, u):
        out, back = jax.vjp(_jax_flat(view.bridge, fun), view.leaves(numpy_tree))
        (grads,) = back(jnp.asarray(np.array(_flat_output_numpy(u), dtype=np.float64),
                                    dtype=out.dtype))
        return _rebuild_numpy(numpy_tree, [np.asarray(g, dtype=np.float64) for g in grads])
    return product


def _jax_scalar(bridge, cost):
    import jax.numpy as jnp

    return lambda xs: jnp.reshape(cost(bridge.assemble(xs)), ())


def _jax_gradient(view, cost):
    import jax

    from .frameworks import _rebuild_numpy

    def gradient(numpy_tree):
        grads = jax.grad(_jax_scalar(view.bridge, cost))(view.leaves(numpy_tree))
        return _rebuild_numpy(numpy_tree, [np.asarray(g, dtype=np.float64) for g in grads])
    return gradient


def _jax_hvp(view, cost):
    import jax

    from .frameworks import _rebuild_numpy

    def product(numpy_tree, v):
        _, hv = jax.jvp(jax.grad(_jax_scalar(view.bridge, cost)), (view.leaves(numpy_tree),),
                        (view.leaves(v),))
        return _rebuild_numpy(numpy_tree, [np.asarray(h, dtype=np.float64) for h in hv])
    return product
