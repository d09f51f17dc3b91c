"""Jacobians: every output of a vector (or tree) function checked like a gradient.

Each output component is compared as its own scalar cost, through the same
pipeline as compare_gradient.  A cache keyed by the evaluation point makes the
function run once per point, not once per output, so a Jacobian with m outputs
costs about what one gradient check costs.  Since the cache replays values, the
checks a gradient check makes at the base point (is the cost deterministic,
does it edit its input) are made here, on the function itself and its whole
output vector, before any output is compared.  A gradient function checked
against a Hessian function is the same call: the gradient is the vector
function, the Hessian its Jacobian.
"""
from __future__ import annotations

import inspect

import numpy as np

from . import plan, verdicts
from .errors import (CheckInputError, CheckInterrupted, CheckTypeError, ExecutorError,
                     interrupts_as_check_interrupted)
from .frameworks import takes_framework_values
from .pipeline import compare_gradient
from .probes import REPEAT_TOLERANCE
from .report import GradientReport, Row
from .tree import coordinate_name, flatten, leaves_of, rebuild


class _OutputCache:
    """fun evaluated once per point; hands out one output component at a time."""

    def __init__(self, fun):
        self.fun, self.values, self.calls = fun, {}, 0

    def remember(self, params, vector) -> None:
        """Store a value already computed at params (no call is counted)."""
        self.values[_point_key(params)] = vector

    def vector(self, params):
        key = _point_key(params)
        if key not in self.values:
            self.calls += 1
            self.values[key] = _flat_output(self.fun(params))
        return self.values[key]

    def component(self, k, name):
        """Output k as a scalar cost; `name` is what the progress bar calls it."""
        def output(params):
            return self.vector(params)[k]
        output.__qualname__ = output.__name__ = name
        return output


def _point_key(params):
    """A hashable key of the point: its dtype and its bytes."""
    point = _flat_output(params)
    return point.dtype.str, point.tobytes()


def _flat_output(out):
    return np.concatenate([np.ravel(np.asarray(x)) for x in leaves_of(out)])


def _output_names(out) -> list:
    """Readable names of the flattened outputs: 'y[2]', or 'W[1, 0]' for tree outputs."""
    if isinstance(out, (dict, list, tuple)):
        _, layout = flatten(_as_float_tree(out), "output")
        return [coordinate_name(layout, i) for i in range(layout.size)]
    shape = np.shape(out)
    if shape == ():
        return ["y"]
    return [f"y[{', '.join(map(str, np.unravel_index(i, shape)))}]"
            for i in range(int(np.prod(shape)))]


def _as_float_tree(t):
    if isinstance(t, dict):
        return {k: _as_float_tree(v) for k, v in t.items()}
    if isinstance(t, (list, tuple)):
        return type(t)(_as_float_tree(v) for v in t) if not hasattr(t, "_fields") else \
            type(t)(*[_as_float_tree(v) for v in t])
    return np.asarray(t, dtype=float)


def _analytic_jacobian(fun, params, jacobian, m, n, allowed_shapes):
    if jacobian is None:
        import autograd
        from .analytic import traced_rebuild

        base, layout = flatten(params)

        def flat_fun(v):
            import autograd.numpy as anp
            out = fun(traced_rebuild(v, layout))
            if isinstance(out, (dict, list, tuple)):
                return anp.concatenate([anp.ravel(x) for x in leaves_of(out)])
            return anp.ravel(out)
        try:
            J = autograd.jacobian(flat_fun)(base)
        except Exception as exc:
            raise CheckInputError(f"jacobian=None: autograd could not differentiate the function "
                                  f"({type(exc).__name__}: {exc}); pass jacobian=") from exc
    elif callable(jacobian):
        try:
            base, layout = flatten(params)
            J = jacobian(rebuild(base, layout))
        except Exception as exc:
            raise CheckInputError(f"jacobian function raised {type(exc).__name__}: {exc}") from exc
    else:
        J = jacobian
    J = _as_jacobian_array(J)
    if J.shape not in allowed_shapes:
        raise CheckInputError(f"jacobian: expected shape ({m}, {n}): {m} x {n} entries, outputs "
                              f"by inputs, flattened, got shape {J.shape}")
    return J.reshape(m, n)


def _check_options(options: dict) -> None:
    """compare_gradient's options, checked before the function is first called."""
    known = [name for name, p in inspect.signature(compare_gradient).parameters.items()
             if p.kind == p.KEYWORD_ONLY]
    plan.check_options("compare_jacobian: ", known, **options)
    if options.get("vectorized"):
        raise CheckInputError("compare_jacobian: vectorized=True is not supported")


def _check_jacobian_argument(jacobian) -> None:
    """None, a function of params, or an array-like of real numbers."""
    if jacobian is None or callable(jacobian):
        return
    if isinstance(jacobian, (str, bytes, dict)) or isinstance(jacobian, np.ma.MaskedArray):
        raise CheckTypeError(f"jacobian: expected None (autograd), a function of params or an "
                             f"array of real numbers, got {type(jacobian).__name__}")


def _as_jacobian_array(J) -> np.ndarray:
    """The analytic Jacobian as a float array; a clear error for anything else."""
    if isinstance(J, np.ma.MaskedArray):
        raise CheckTypeError("jacobian: a masked array; masks are not supported (pass "
                             ".filled(value))")
    try:
        array = np.asarray(J)
    except Exception as exc:  # noqa: BLE001 - ragged lists and the like
        raise CheckTypeError(f"jacobian: expected an array of real numbers, got "
                             f"{type(J).__name__} ({type(exc).__name__}: {exc})") from exc
    if not (np.issubdtype(array.dtype, np.floating) or np.issubdtype(array.dtype, np.integer)
            or array.dtype == np.bool_):
        raise CheckTypeError(f"jacobian: expected an array of real numbers, got "
                             f"{type(J).__name__} of {array.dtype}")
    return array.astype(float)


def _call_at_base(fun, params, label="at the base point"):
    try:
        return fun(params)
    except Exception as exc:
        raise CheckInputError(f"fun raised {type(exc).__name__} {label}: {exc}") from exc


def _flat_values(out, label="at the base point") -> np.ndarray:
    """The function's outputs as one vector; a clear error for outputs that are not numbers."""
    try:
        flat = _flat_output(out)
    except Exception as exc:
        raise CheckInputError(f"fun: returned {type(out).__name__} {label}; expected an array, "
                              f"a number or a dict / list / tuple nest of those") from exc
    if not (np.issubdtype(flat.dtype, np.number) or flat.dtype == np.bool_):
        raise CheckInputError(f"fun: returned {flat.dtype} values {label}; expected numbers")
    return flat


def _check_finite_real(values: np.ndarray, names: list) -> None:
    """Outputs at the base point must be finite real numbers, as a gradient check's cost."""
    if np.iscomplexobj(values):
        raise CheckInputError("fun returned complex numbers at real parameters; expected real "
                              "outputs")
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        shown = ", ".join(f"{names[k]} = {values[k]}" for k in bad[:3])
        raise CheckInputError(f"fun returned non-finite outputs at the base point ({shown}"
                              + (" ..." if bad.size > 3 else "") + "); expected finite numbers")


def _changed_leaves(after, base: np.ndarray, layout) -> list:
    """Names of the parameters that a call changed in place (its copy of them)."""
    try:
        now, _ = flatten(after)
    except Exception:  # noqa: BLE001 - a changed structure is a change too
        return ["the structure of params"]
    if now.shape != base.shape:
        return ["the structure of params"]
    return [leaf.name for leaf in layout.leaves
            if not np.array_equal(now[leaf.offset:leaf.offset + leaf.size],
                                  base[leaf.offset:leaf.offset + leaf.size], equal_nan=True)]


def _repeat_problem(first: np.ndarray, again: np.ndarray, names: list):
    """The 'not deterministic' problem when two base calls differ, else None.

    Each output is held to the rule a gradient check applies to its cost's two
    base calls: a difference above REPEAT_TOLERANCE epsilons of the larger value."""
    advice = ("Numeric derivatives of a random function are meaningless: seed its random "
              "generator, fix the mini-batch, and switch off dropout or sampling before checking "
              "the Jacobian")
    if first.shape != again.shape:
        return (f"the function is not deterministic: two calls at the same parameters returned "
                f"{first.size} and {again.size} outputs. {advice}")
    a, b = first.astype(complex), again.astype(complex)
    size = np.maximum(np.abs(a), np.abs(b))
    with np.errstate(invalid="ignore"):
        diff = np.where(np.isnan(a) & np.isnan(b), 0.0, np.abs(a - b))
    differs = ~(diff <= REPEAT_TOLERANCE * np.finfo(float).eps * size)
    if not differs.any():
        return None
    k = int(np.flatnonzero(differs)[np.argmax(np.where(np.isnan(diff), np.inf,
                                                          diff)[differs])])
    relative = diff[k] / max(size[k], 1e-300)
    return (f"the function is not deterministic: two calls at the same parameters returned "
            f"different outputs ({int(differs.sum())} of {first.size} differ; {names[k]} was "
            f"{first[k].item()!r} and then {again[k].item()!r}, difference {diff[k]:.3g}, "
            f"relative {relative:.3g}). {advice}")


TITLE = "jacobian check"


@interrupts_as_check_interrupted(TITLE)
@takes_framework_values
def compare_jacobian(fun, params, jacobian=None, **options) -> GradientReport:
    """Compare an analytic Jacobian with numeric derivatives, entry by entry.

    Each output is checked as a scalar cost through compare_gradient; a cache makes
    `fun` run once per point, not once per output.  The function is called twice at
    the base point, each time on its own copy of params: outputs that differ fail the
    check (a random function), and a copy it edited gives a note.

    Parameters
    ----------
    fun : callable
        params -> an array, a number, or a dict / list / tuple nest of those.
    params : ndarray, float, or a dict / list / tuple nest of those
    jacobian : None, callable or array of float, shape (m, n)
        None: autograd; a function of params; or an array with one row per flattened
        output and one column per flattened parameter coordinate (for one array
        parameter and an array output, shape output.shape + param.shape also works).
    **options
        compare_gradient's options (vectorized costs are not supported here).

    Returns
    -------
    GradientReport
        Rows named 'output wrt input', e.g. 'y[2] wrt W[1, 0]'.

    Raises
    ------
    CheckTypeError, CheckInputError
        For bad input, before `fun` is called (an unknown option, a jacobian that is not
        an array of numbers), or when `fun` fails at the base point.
    CheckInterrupted
        On Ctrl-C, with the Jacobian's partial report (every output finished so far).
    ExecutorError
        When the executor stops working, with the Jacobian's partial report.

    Examples
    --------
    >>> import numpy as np
    >>> report = compare_jacobian(lambda x: x ** 2, np.array([1.0, 3.0]),
    ...                           lambda x: np.diag(2 * x))
    >>> report.passed, len(report.rows)
    (True, 4)
    """
    plan.check_callable(fun, "fun")
    _check_options(options)
    _check_jacobian_argument(jacobian)
    base, layout = flatten(params)
    first_params = rebuild(base.copy(), layout)
    y0 = _call_at_base(fun, first_params)
    edited = _changed_leaves(first_params, base, layout)
    first = _flat_values(y0)
    again = _flat_values(_call_at_base(fun, rebuild(base.copy(), layout),
                                       "at the base point, called a second time"),
                         "at the base point, called a second time")
    names = _output_names(y0)
    _check_finite_real(first, names)
    m, n = len(names), layout.size
    shapes = {(m, n)}
    if len(layout.leaves) == 1 and not isinstance(y0, (dict, list, tuple)):
        shapes.add(tuple(np.shape(y0)) + layout.leaves[0].shape)  # e.g. a Hessian (n, n)
    J = _analytic_jacobian(fun, params, jacobian, m, n, shapes)
    notes = []
    if edited:
        notes.append(f"the function modifies its input in place (it changed {', '.join(edited)} "
                     "during a call); every call here gets its own copy, so your arrays are "
                     "unchanged, but code that reuses the arrays after calling the function is "
                     "not")
    problem = _repeat_problem(first, again, names)
    if problem:  # a random function: no entry can be judged
        return GradientReport(rows=[], method=str(options.get("method", "auto")), evaluations=2,
                              total=m * n, notes=notes, problems=[problem],
                              title=TITLE, extra={"outputs": m, "inputs": n})
    cache = _OutputCache(fun)
    cache.remember(rebuild(base.copy(), layout), first)
    label = getattr(fun, "__name__", None) or type(fun).__name__
    parts = []
    for k in range(m):
        try:
            parts.append(compare_gradient(cache.component(k, f"{label} {names[k]}"), params,
                                          rebuild(J[k].copy(), layout), **options))
        except (CheckInterrupted, ExecutorError) as stop:
            # carry the Jacobian's partial report: the outputs finished, and this one's rows
            if stop.report is not None:
                parts.append(stop.report)
            report = _jacobian_report(parts, names, n, notes, cache.calls + 2)
            report.interrupted = isinstance(stop, CheckInterrupted)
            if isinstance(stop, CheckInterrupted):
                raise CheckInterrupted(report, TITLE, report.evaluations) from None
            raise ExecutorError(str(stop), report) from None   # its problem came with it
    return _jacobian_report(parts, names, n, notes, cache.calls + 2)


def _jacobian_report(parts: list, names: list, n: int, notes: list,
                     evaluations: int) -> GradientReport:
    """One report from the per-output reports `parts` (output k is parts[k])."""
    m = len(names)
    rows, hints, problems, methods = [], [], [], set()
    interrupted = False
    part_notes = []
    for k, part in enumerate(parts):
        methods.add(part.method)
        interrupted |= part.interrupted
        for r in part.rows:
            rows.append(Row(f"{names[k]} wrt {r.name}", r.parameter, r.index,
                            k * n + r.flat_index, r.analytic, r.numeric, r.absolute_error,
                            r.relative_error, r.error_estimate, r.verdict, r.detail))
        part_notes += [f"{names[k]}: {t}" for t in part.notes
                       if f"{names[k]}: {t}" not in part_notes]
        hints += [f"{names[k]}: {t}" for t in part.hints]
        problems += [p for p in part.problems if p not in problems]
    notes = notes + _merge_repeated(part_notes, names)
    a, nu = (np.array([getattr(r, f) for r in rows]) for f in ("analytic", "numeric"))
    rtol_s, atol_s = verdicts.suggest_tolerances(a, nu, np.array([r.verdict for r in rows]))
    # the two base calls, and the cache's calls everywhere else
    return GradientReport(rows=rows, method="/".join(sorted(methods)) or "none",
                          evaluations=evaluations, total=m * n, hints=hints, notes=notes,
                          problems=problems, suggested_rtol=rtol_s, suggested_atol=atol_s,
                          interrupted=interrupted, title=TITLE,
                          extra={"outputs": m, "inputs": n})


def _merge_repeated(notes, names):
    """A note that every output repeats is said once, for all outputs."""
    bodies = {}
    for note in notes:
        head, _, body = note.partition(": ")
        bodies.setdefault(body, []).append(head)
    out = []
    for body, heads in bodies.items():
        out.append(f"all outputs: {body}" if len(heads) == len(names) and len(names) > 1
                   else f"{', '.join(heads)}: {body}")
    return out
