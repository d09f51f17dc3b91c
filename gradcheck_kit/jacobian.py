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
from .errors import CheckInputError
from .pipeline import REPEAT_TOLERANCE, compare_gradient
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


def _check_options(options: dict) -> None:
    """compare_gradient's options, checked before the function is first called."""
    known = [name for name, p in inspect.signature(compare_gradient).parameters.items()
             if p.kind == p.KEYWORD_ONLY]
    unknown = sorted(set(options) - set(known))
    if unknown:
        raise CheckInputError(f"compare_jacobian: unknown option {unknown[0]!r}; expected one of "
                              f"{', '.join(known)}")
    plan.check_method(options.get("method", "auto"))
    plan.check_flags(seed=options.get("seed"), progress=options.get("progress"))
    for name in ("rtol", "atol"):
        plan.check_tolerance(options.get(name), name)


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


def compare_jacobian(fun, params, jacobian=None, **options) -> GradientReport:
    """Compare an analytic Jacobian with numeric derivatives, entry by entry.

    `jacobian`: None (autograd), a function of params, or an array with one row
    per flattened output and one column per flattened parameter coordinate.
    Options are compare_gradient's (vectorized costs are not supported here).
    Rows are named 'output wrt input', e.g. 'y[2] wrt W[1, 0]'.

    The function is called twice at the base point, each time on its own copy of
    params: outputs that differ fail the check (a random function), and a copy
    it edited gives a note.  The output cache then starts from the first value,
    so these two calls cost what the per-output checks would have spent there.
    """
    if options.get("vectorized"):
        raise CheckInputError("compare_jacobian: vectorized=True is not supported")
    if not callable(fun):
        raise CheckInputError(f"fun: expected a callable, got {type(fun).__name__}")
    _check_options(options)
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
                              title="jacobian check", extra={"outputs": m, "inputs": n})
    cache = _OutputCache(fun)
    cache.remember(rebuild(base.copy(), layout), first)
    rows, hints, problems, methods = [], [], [], set()
    interrupted = False
    part_notes = []
    for k in range(m):
        part = compare_gradient(cache.component(k), params, rebuild(J[k].copy(), layout),
                                **options)
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
    notes += _merge_repeated(part_notes, names)
    a, nu = (np.array([getattr(r, f) for r in rows]) for f in ("analytic", "numeric"))
    rtol_s, atol_s = verdicts.suggest_tolerances(a, nu, np.array([r.verdict for r in rows]))
    # the two base calls above, and the cache's calls everywhere else
    return GradientReport(rows=rows, method="/".join(sorted(methods)), evaluations=cache.calls + 2,
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
