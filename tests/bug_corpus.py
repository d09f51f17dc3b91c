"""A corpus of planted gradient bugs, built from correct gradients.

Each planted case changes a correct analytic gradient in one of the ways bugs
appear in hand-written code (sign flip, factor 2 or 1/2, a dropped term,
swapped or shifted entries, small relative errors) and records which flat
coordinates it changed, so tests can ask that the report names them.
"""
from __future__ import annotations

from dataclasses import dataclass

import autograd
import autograd.numpy as anp
import numpy as np

from gradcheck_kit.analytic import traced_rebuild
from gradcheck_kit.tree import flatten, flatten_like, rebuild
import mgh_problems
import ml_losses

GROSS = ("sign", "double", "half", "dropped-term", "swapped", "shifted", "relative-1e-2")
KINDS = GROSS + ("relative-1e-3", "relative-1e-5")


@dataclass
class Planted:
    source: str
    kind: str
    cost: object
    params: object
    gradient: object        # the wrong gradient, as a fixed structure
    changed: tuple          # flat indices that differ from the right gradient
    right: np.ndarray       # the right gradient, flat


def correct_cases(seeds=range(4)):
    """(name, cost, gradient function, params, per-sample terms function) tuples."""
    out = []
    for seed in seeds:
        for factory in ml_losses.FACTORIES:
            c = factory(np.random.default_rng(seed))
            out.append((f"{c.name}/seed{seed}", c.cost, c.gradient, c.params, c.per_sample))
    for p in mgh_problems.PROBLEMS:
        for label, x in (("x0", np.array(p.x0)), ("10x0", 10 * np.array(p.x0))):
            residuals = _squared_residuals(p)
            out.append((f"{p.name}/{label}", p.cost, mgh_problems.float_gradient(p.name), x,
                        residuals))
    return out


def _squared_residuals(problem):
    """Per-residual terms of an MGH cost (each f_i^2), traceable by autograd."""
    return lambda x: anp.array(problem.residuals(x, mgh_problems.AG)) ** 2


def _term_matrix(per_sample, params, layout):
    """Per-sample contributions to each flat gradient coordinate: shape (samples, n)."""
    jac = autograd.jacobian(lambda v: per_sample(traced_rebuild(v, layout)))
    base, _ = flatten(params)
    J = np.asarray(jac(base))
    return J / J.shape[0]


def plant(kind, g, rng, terms=None, leaf_spans=()):
    """(wrong flat gradient, changed indices) or None when the kind does not apply."""
    big = np.flatnonzero(np.abs(g) >= 1e-2 * np.max(np.abs(g)))
    if big.size == 0:
        return None
    i = int(rng.choice(big))
    w = g.copy()
    if kind == "sign":
        w[i] = -g[i]
    elif kind == "double":
        w[i] = 2 * g[i]
    elif kind == "half":
        w[i] = g[i] / 2
    elif kind.startswith("relative-"):
        w[i] = g[i] * (1 + float(kind.split("-", 1)[1]) * rng.choice([-1, 1]))
    elif kind == "dropped-term":
        if terms is None:
            return None
        k = int(np.argmax(np.abs(terms[:, i])))
        w[i] = g[i] - terms[k, i]
        if abs(w[i] - g[i]) < 1e-2 * abs(g[i]):
            return None
    elif kind == "swapped":
        others = [j for j in big if abs(g[j] - g[i]) > 1e-2 * max(abs(g[i]), abs(g[j]))]
        if not others:
            return None
        j = int(rng.choice(others))
        w[i], w[j] = g[j], g[i]
    elif kind == "shifted":
        lo, hi = next(((a, b) for a, b in leaf_spans if a <= i < b), (0, g.size))
        if hi - lo < 2:
            return None
        w[lo:hi] = np.roll(g[lo:hi], 1)
    changed = np.flatnonzero(np.abs(w - g) > 1e-6 * np.maximum(np.abs(g), np.abs(w)))
    if kind in GROSS and kind not in ("sign", "double", "half", "relative-1e-2"):
        changed = np.flatnonzero(np.abs(w - g) > 1e-3 * np.max(np.abs(g)))
    if changed.size == 0:
        return None
    return w, tuple(int(c) for c in changed)


def build(seed=0, kinds=KINDS, seeds=range(4), draws=2):
    rng = np.random.default_rng(seed)
    planted = []
    for name, cost, grad, params, per_sample in correct_cases(seeds):
        base, layout = flatten(params)
        g = flatten_like(grad(rebuild(base.copy(), layout)), layout, "gradient")
        terms = _term_matrix(per_sample, params, layout) if per_sample is not None else None
        spans = [(leaf.offset, leaf.offset + leaf.size) for leaf in layout.leaves]
        for kind in kinds:
            for _ in range(draws):
                made = plant(kind, g, rng, terms, spans)
                if made is not None:
                    w, changed = made
                    planted.append(Planted(name, kind, cost, params,
                                           rebuild(w.copy(), layout), changed, g))
    return planted
