"""Jacobians: every output of a vector (or tree) function checked like a gradient.

Each output component is compared as its own scalar cost, through the same
pipeline as compare_gradient.  A cache keyed by the evaluation point makes the
function run once per point, not once per output, so a Jacobian with m outputs
costs about what one gradient check costs.  A gradient function checked
against a Hessian function is the same call: the gradient is the vector
function, the Hessian its Jacobian.
"""
from __future__ import annotations

import numpy as np

from . import verdicts
from .errors import CheckInputError
from .pipeline import compare_gradient
from .report import GradientReport, Row
from .tree import coordinate_name, flatten, leaves_of, rebuild


class _OutputCache:
    """fun evaluated once per point; hands out one output component at a time."""

    def __init__(self, fun):
        self.fun, self.values, self.calls = fun, {}, 0

    def vector(self, params):
        key = _point_key(params)
        if key not in self.values:
            self.calls += 1
            self.values[key] = _flat_output(self.fun(params))
        return self.values[key]

    def component(self, k):
        return lambda params: self.vector(params)[k]


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
    J = np.asarray(J, dtype=float)
    if J.shape not in allowed_shapes:
        raise CheckInputError(f"jacobian: expected shape ({m}, {n}): {m} x {n} entries, outputs "
                              f"by inputs, flattened, got shape {J.shape}")
    return J.reshape(m, n)


def compare_jacobian(fun, params, jacobian=None, **options) -> GradientReport:
    """Compare an analytic Jacobian with numeric derivatives, entry by entry.

    `jacobian`: None (autograd), a function of params, or an array with one row
    per flattened output and one column per flattened parameter coordinate.
    Options are compare_gradient's (vectorized costs are not supported here).
    Rows are named 'output wrt input', e.g. 'y[2] wrt W[1, 0]'.
    """
    if options.get("vectorized"):
        raise CheckInputError("compare_jacobian: vectorized=True is not supported")
    if not callable(fun):
        raise CheckInputError(f"fun: expected a callable, got {type(fun).__name__}")
    base, layout = flatten(params)
    try:
        y0 = fun(rebuild(base.copy(), layout))
    except Exception as exc:
        raise CheckInputError(f"fun raised {type(exc).__name__} at the base point: {exc}") \
            from exc
    names = _output_names(y0)
    m, n = len(names), layout.size
    shapes = {(m, n)}
    if len(layout.leaves) == 1 and not isinstance(y0, (dict, list, tuple)):
        shapes.add(tuple(np.shape(y0)) + layout.leaves[0].shape)  # e.g. a Hessian (n, n)
    J = _analytic_jacobian(fun, params, jacobian, m, n, shapes)
    cache = _OutputCache(fun)
    rows, notes, hints, problems, methods = [], [], [], [], set()
    interrupted = False
    for k in range(m):
        part = compare_gradient(cache.component(k), params, rebuild(J[k].copy(), layout),
                                **options)
        methods.add(part.method)
        interrupted |= part.interrupted
        for r in part.rows:
            rows.append(Row(f"{names[k]} wrt {r.name}", r.parameter, r.index,
                            k * n + r.flat_index, r.analytic, r.numeric, r.abs_error,
                            r.rel_error, r.error_estimate, r.verdict, r.detail))
        notes += [f"{names[k]}: {t}" for t in part.notes if f"{names[k]}: {t}" not in notes]
        hints += [f"{names[k]}: {t}" for t in part.hints]
        problems += [p for p in part.problems if p not in problems]
    notes = _merge_repeated(notes, names)
    a, nu = (np.array([getattr(r, f) for r in rows]) for f in ("analytic", "numeric"))
    rtol_s, atol_s = verdicts.suggest_tolerances(a, nu, np.array([r.verdict for r in rows]))
    return GradientReport(rows=rows, method="/".join(sorted(methods)), evaluations=cache.calls + 1,
                          total=m * n, hints=hints, notes=notes, problems=problems,
                          suggested_rtol=rtol_s, suggested_atol=atol_s,
                          interrupted=interrupted, title="jacobian check",
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
