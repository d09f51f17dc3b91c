"""Hints: what the pattern of the mismatches suggests.  Stage after verdicts, before report.

Verdicts decide agree or disagree, row by row; hints read those verdicts and
explain a failure: a flipped sign, a factor (a constant, or one of the point's
own values: 1/p, p, exp(p), exp(-p)), a regularisation coefficient off, a missing
term, a transposed matrix, swapped or shifted entries, one parameter wrong.

A wrong hint is worse than none, so:

- every closeness test uses the tool's own allowed difference (the error
  estimate and the rounding allowance of `verdicts.allowed_difference` without
  rtol / atol), never the caller's rtol: a loose rtol makes everything "close";
- rows where the stencil saw a kink are left out (their numeric value is the
  mean of two slopes, not a derivative);
- "mean versus sum" is said only for a ratio that is an integer k to within
  that allowance, after the point's own values were tried;
- an off-by-one shift must explain at least two wrong entries, none of them by
  a zero (one missing term is a missing term).

Each hint starts with a key word and a colon ("sign:", "factor:", "regularisation:",
"missing term:", "transposed:", "shifted:", "swapped:", "single parameter:").
"""
from __future__ import annotations

from fractions import Fraction

import numpy as np

from . import stencils
from .tree import Layout, coordinate_name, leaf_of_each
from .verdicts import name_list, suggest_tolerances

SIGN_SHARE = 0.8         # share of the wrong rows that must be negated for a sign hint
# Relative slack on top of the allowance: the products k * numeric are rounded too.
PRODUCT_ROUNDING = 1e-12
LARGEST_INTEGER = 10 ** 7   # a ratio above this is not read as a count of items

# The point's own values p a factor may be made of: (form, function of p, explanation).
POINT_FACTORS = (
    ("1/p", lambda p: 1.0 / p,
     "an extra division by the parameter's value, or a factor p left out"),
    ("p", lambda p: p,
     "a stray factor of the parameter's value (a chain rule applied to a parameter that "
     "is not on a log scale?)"),
    ("exp(p)", np.exp,
     "an extra factor exp(p): the chain rule of a log-scale parameter applied twice?"),
    ("exp(-p)", lambda p: np.exp(-p),
     "the chain-rule factor exp(p) of a log-scale parameter is missing (with s = exp(p), "
     "d/dp = s d/ds)?"),
)


def _close(x, y, tol):
    """|x - y| within the allowance tol (plus the rounding of forming y)."""
    return np.abs(x - y) <= tol + PRODUCT_ROUNDING * np.maximum(np.abs(x), np.abs(y))


def _times(c) -> np.ndarray:
    """The allowance of c * numeric grows with |c|: the numeric error is scaled by it."""
    return np.maximum(np.abs(c), 1.0)


def describe_factor(c: float) -> str:
    """Words for a ratio analytic / numeric: 'k times', '1/k of', else a fraction or c.

    Parameters
    ----------
    c : float
        The ratio, already known to hold to within the tool's allowance.

    Returns
    -------
    str

    Examples
    --------
    >>> describe_factor(2.0), describe_factor(0.5), describe_factor(1.5), describe_factor(1.1)
    ('2 times the numeric one', '1/2 of the numeric one', '3/2 of the numeric one', \
'1.1 times the numeric one')
    """
    if c >= 2 and float(round(c)) == c:
        return f"{int(round(c))} times the numeric one"
    if 0 < c < 1 and float(round(1 / c)) == 1 / c:
        return f"1/{int(round(1 / c))} of the numeric one"
    near = Fraction(c).limit_denominator(8)
    if near.denominator > 1 and abs(float(near) - c) <= 1e-12 * abs(c):
        return f"{near.numerator}/{near.denominator} of the numeric one"
    return f"{c:.4g} times the numeric one"


def _snap(c, a, n, tol):
    """c replaced by the nearest k, 1/k or small fraction when that fits every row."""
    candidates = []
    if c >= 1:
        candidates.append(float(round(c)))
    elif c > 0:
        candidates.append(1.0 / round(1 / c))
    candidates.append(float(Fraction(c).limit_denominator(8)))
    for k in candidates:
        if k > 0 and np.all(_close(a, k * n, tol * _times(k))):
            return k
    return c


def factor_hint(names, p, a, n, tol) -> str | None:
    """A constant factor or one of the point's own values, analytic / numeric, or None.

    Parameters
    ----------
    names : list of str
        The wrong rows' coordinate names.
    p, a, n, tol : ndarray of float, shape (k,)
        Their values in params, analytic and numeric values, and the tool's own
        allowed difference.

    Returns
    -------
    str or None

    Examples
    --------
    >>> factor_hint(["s"], np.array([np.log(0.1)]), np.array([-5.0]), np.array([-0.5]),
    ...             np.array([1e-15]))[:56]
    'factor: at s the analytic value is 10 times the numeric '
    """
    if np.any(np.abs(a) <= tol) or np.any(np.abs(n) <= tol):
        return None
    ratio = a / n
    where = name_list(names)
    one_point = np.unique(p).size == 1
    with np.errstate(all="ignore"):
        for form, fun, why in POINT_FACTORS:
            c = fun(p)
            if np.all(np.isfinite(c)) and np.all(_close(a, c * n, tol * _times(c))) and \
                    not np.all(np.isclose(c, 1.0)):
                if one_point:
                    k = _snap(float(ratio[0]), a, n, tol)
                    return (f"factor: at {where} the analytic value is {describe_factor(k)}, "
                            f"which is {form} for its value p = {float(p[0]):.4g}: {why}")
                return (f"factor: at {where} the analytic value is the numeric one times "
                        f"{form}, p being each coordinate's own value: {why}")
    c = float(np.median(ratio))
    if c <= 0 or np.isclose(c, 1.0, rtol=1e-3, atol=0):
        return None
    if not np.all(_close(a, c * n, tol * _times(c))):
        return None
    k = _snap(c, a, n, tol)
    text = f"factor: at {where} the analytic value is {describe_factor(k)}"
    items = round(k) if k >= 1 else round(1 / k)
    exact = (k == float(items) or k == 1.0 / items) and 3 <= items <= LARGEST_INTEGER
    if exact and k >= 3:
        return text + (f": a sum over {items} items where the cost takes their mean (mean "
                       f"versus sum)? {items} could be the batch or data size")
    if exact:
        return text + (f": a mean over {items} items where the cost sums them (mean versus "
                       f"sum)? {items} could be the batch or data size")
    if k == c:
        text += ": a constant factor is off"
    return text


def regularisation_hint(names, p, a, n, tol) -> str | None:
    """analytic - numeric = c * p with one c at two or more distinct points, or None.

    Examples
    --------
    >>> p = np.array([0.5, -1.0, 2.0])
    >>> regularisation_hint(["w[0]", "w[1]", "w[2]"], p, 3 * p - 0.1 * p, 3 * p,
    ...                     np.full(3, 1e-14))[:48]
    'regularisation: analytic - numeric = c p at w[0]'
    """
    if np.unique(p).size < 2 or not np.all(np.isfinite(p)):
        return None
    diff = a - n
    c = float(p @ diff / (p @ p))
    if c == 0 or not np.all(_close(diff, c * p, tol)):
        return None
    return (f"regularisation: analytic - numeric = c p at {name_list(names)}, with c = "
            f"{c:.4g} and p each coordinate's value: a penalty's coefficient is off (the "
            "gradient of lambda ||p||^2 is 2 lambda p: 1 versus 2, or lambda left out)?")


def hints(layout: Layout, coords, base, analytic, numeric, verdict, allowed,
          kinked=None) -> list:
    """Sentences naming the pattern of the mismatches.

    Parameters
    ----------
    layout : Layout
        The parameters' layout (names, shapes).
    coords : ndarray of int, shape (k,)
        The checked coordinates (flat indices).
    base : ndarray of float, shape (n,)
        The flat point (the full vector).
    analytic, numeric : ndarray of float, shape (k,)
        Values at the checked coordinates.
    verdict : ndarray of str, shape (k,)
        Their verdicts (by the caller's rule, rtol included).
    allowed : ndarray of float, shape (k,)
        The tool's own allowed difference, from its error estimates: never the
        caller's rtol / atol.
    kinked : ndarray of bool, shape (k,), optional
        Rows where the stencil saw a kink: left out.

    Returns
    -------
    list of str

    Examples
    --------
    >>> import numpy as np
    >>> from gradcheck_kit.tree import flatten
    >>> base, layout = flatten(np.array([1.0, 2.0, 3.0]))
    >>> hints(layout, np.arange(3), base, -2 * base, 2 * base,
    ...       np.array(["disagree"] * 3, dtype=object), np.full(3, 1e-14))[0][:5]
    'sign:'
    """
    coords = np.asarray(coords)
    kinked = np.zeros(len(coords), dtype=bool) if kinked is None else np.asarray(kinked, bool)
    with np.errstate(invalid="ignore"):
        beyond = ~(np.abs(analytic - numeric) <= allowed)
    wrong = (verdict == "disagree") & beyond & ~kinked
    if not wrong.any():
        return []
    a, n, tol = analytic[wrong], numeric[wrong], allowed[wrong]
    p = np.asarray(base)[coords[wrong]]
    names = [coordinate_name(layout, int(c)) for c in coords[wrong]]
    out = []
    solid = np.abs(n) > tol
    solid_names = [m for m, s in zip(names, solid) if s]
    if solid.any() and np.mean(_close(a[solid], -n[solid], tol[solid])) >= SIGN_SHARE:
        out.append(f"sign: the analytic value is the negative of the numeric one at "
                   f"{name_list(solid_names)}: a sign error")
    elif solid.any():
        args = (solid_names, p[solid], a[solid], n[solid], tol[solid])
        found = factor_hint(*args) or regularisation_hint(*args)
        if found:
            out.append(found)
    zero = (np.abs(a) <= tol) & solid
    if zero.any():
        out.append(f"missing term: the analytic gradient is zero at "
                   f"{name_list([m for m, z in zip(names, zero) if z])}, where the cost does "
                   "change")
    out += layout_hints(layout, coords, analytic, numeric, wrong, allowed)
    leaf_no = leaf_of_each(layout)[coords]
    bad_leaves = set(leaf_no[wrong])
    if len(bad_leaves) == 1 and len(layout.leaves) > 1:
        only_leaf = bad_leaves.pop()
        only = layout.leaves[only_leaf].name
        if np.any((leaf_no != only_leaf) & (verdict == "agree")):
            out.append(f"single parameter: only '{only}' disagrees while the other parameters "
                       f"agree: look at the part of the gradient that computes '{only}'")
    return out


def layout_hints(layout: Layout, coords, analytic, numeric, wrong, allowed) -> list:
    """Transposed matrices and swapped or shifted entries, within one fully checked leaf.

    `wrong` marks the rows that differ beyond the tool's own allowance (see `hints`).
    """
    out = []
    where = {int(c): j for j, c in enumerate(coords)}
    for leaf in layout.leaves:
        span = range(leaf.offset, leaf.offset + leaf.size)
        if leaf.size < 2 or not all(i in where for i in span):
            continue
        js = np.array([where[i] for i in span])
        bad = np.flatnonzero(wrong[js])
        if bad.size == 0:
            continue
        A, N, T = analytic[js], numeric[js], allowed[js]
        if len(leaf.shape) == 2 and leaf.shape[0] == leaf.shape[1]:
            Nt = N.reshape(leaf.shape).T.ravel()
            if np.all(_close(A, Nt, T)):
                out.append(f"transposed: the analytic gradient of '{leaf.name}' equals the "
                           "transpose of the numeric one")
                continue
        nonzero = np.abs(A[bad]) > T[bad]
        shifted = False
        if bad.size >= 2 and nonzero.all():
            for k in (1, -1):
                if np.all(_close(A[bad], np.roll(N, k)[bad], T[bad])):
                    out.append(f"shifted: the analytic entries of '{leaf.name}' equal the "
                               f"numeric ones moved by {k:+d} position (an off-by-one index)")
                    shifted = True
                    break
        if not shifted and bad.size == 2:
            i, j = bad
            if _close(A[i], N[j], T[i]) and _close(A[j], N[i], T[j]):
                out.append(f"swapped: the analytic values of "
                           f"{coordinate_name(layout, leaf.offset + int(i))} and "
                           f"{coordinate_name(layout, leaf.offset + int(j))} are exchanged")
    return out


# --- tolerances for those who pin central differences -------------------------------------
def central_error(derivative, f0, base, eps, eps_f, noise, curvature, third) -> np.ndarray:
    """Modelled error of a central difference at its automatic step, per coordinate.

    The check may have used another method (the complex step, Richardson); a user who
    pins ``method="central"`` in a test meets the central difference's error instead.
    It is the error model of `stencils.combine` for central differences, fed with the
    values a local quadratic f0 + h d + h^2 f2 / 2 would give: no evaluation is spent.

    Parameters
    ----------
    derivative : ndarray of float, shape (k,)
        The numeric derivatives of the check.
    f0 : float
        The cost at the point.
    base, eps : ndarray of float, shape (k,)
        The coordinates' values and the precision their steps are sized for.
    eps_f, noise : float
        Relative precision and measured absolute noise of the cost's values.
    curvature, third : ndarray of float, shape (k,)
        A typical |f2| and |f3| per coordinate.

    Returns
    -------
    ndarray of float, shape (k,)

    Examples
    --------
    >>> e = central_error(np.array([1.0]), 1.0, np.array([0.5]), np.array([2.0 ** -52]),
    ...                   2.0 ** -52, 0.0, np.array([1.0]), np.array([1.0]))
    >>> bool(1e-12 < e[0] < 1e-8)
    True
    """
    h = stencils.default_steps("central", base, eps)
    s = stencils.scale_of(base)
    d = np.where(np.isfinite(derivative), derivative, 0.0)
    bend = h ** 2 * curvature / 2
    values = np.stack([f0 + h * d + bend, f0 - h * d + bend], axis=1)
    with np.errstate(all="ignore"):
        est = stencils.combine("central", values, h, s,
                               stencils.Near(f0, eps_f, noise, curvature, third))
    return est.error


def central_tolerances(analytic, numeric, verdict, error, margin=1.0) -> tuple:
    """(rtol, atol) that central differences pass on the agreeing rows, with `margin`.

    A central difference can be off from the check's value by its own error on top
    of today's difference: the rule of `verdicts.suggest_tolerances` is applied to
    |analytic - numeric| + error.  `error` is already a bound (the error estimate's
    promise, tests/calibration.py) and the result is rounded up to a power of ten, so
    no further margin is added by default.

    Parameters
    ----------
    analytic, numeric, error : ndarray of float, shape (k,)
    verdict : ndarray of str, shape (k,)
    margin : float

    Returns
    -------
    (float, float) or (None, None) when no row agrees

    Examples
    --------
    >>> central_tolerances(np.array([1.0]), np.array([1.0]), np.array(["agree"]),
    ...                    np.array([3e-10]))
    (1e-09, 0.0)
    """
    widened = numeric + (np.abs(analytic - numeric) + error)
    return suggest_tolerances(widened, numeric, verdict, margin)


def uphill_hint() -> str:
    """The hint when the descent probe (probes.descent_uphill) finds the gradient uphill."""
    return ("descent: a small step against the analytic gradient raises the cost and a step "
            "along it lowers it: it points uphill, so gradient descent would climb")
