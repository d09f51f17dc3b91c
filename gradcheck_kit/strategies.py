"""Hypothesis strategies for gradient checks: well-scaled points and parameter trees.

Points drawn here stay where finite differences are meaningful: magnitudes
between `smallest` and `largest` (or exactly zero), no NaN, no infinity, no
subnormal numbers, so a check fails for the gradient's sake and not because a
drawn point overflowed the cost.

Examples::

    from gradcheck_kit import strategies as gst

    @gk.case(params=gst.points((3,)))                          # a vector of 3
    def cost(x): ...

    @gk.case(params=gst.parameter_trees({"W": (4, 2), "b": (2,)}, largest=3.0))
    def loss(p): ...

    gst.points((5,), smallest=0.1, largest=10.0, signs="negative")   # only negative entries

This module imports hypothesis; the rest of gradcheck_kit does not.
"""
from __future__ import annotations

import numpy as np
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp


def scalars(*, smallest=1e-3, largest=1e3, signs="both", zero=True):
    """Floats with smallest <= |x| <= largest (and 0.0 if zero=True)."""
    if not 0 < smallest <= largest:
        raise ValueError("scalars: expected 0 < smallest <= largest")
    magnitude = st.floats(smallest, largest, allow_nan=False, allow_infinity=False,
                          allow_subnormal=False)
    if signs == "positive":
        values = magnitude
    elif signs == "negative":
        values = magnitude.map(lambda v: -v)
    elif signs == "both":
        values = st.tuples(st.booleans(), magnitude).map(lambda t: -t[1] if t[0] else t[1])
    else:
        raise ValueError("scalars: signs must be 'both', 'positive' or 'negative'")
    return st.one_of(st.just(0.0), values) if zero and signs == "both" else values


def points(shape, *, smallest=1e-3, largest=1e3, signs="both", zero=True, dtype=np.float64):
    """Arrays of the given shape with well-scaled entries (see scalars)."""
    return hnp.arrays(dtype, shape, elements=scalars(smallest=smallest, largest=largest,
                                                     signs=signs, zero=zero))


def parameter_trees(shapes: dict, **scale):
    """Dicts {name: array of shapes[name]} (a shape () gives a Python float)."""
    parts = {}
    for name, shape in shapes.items():
        shape = tuple(shape)
        parts[name] = scalars(**{k: v for k, v in scale.items() if k != "dtype"}) if shape == () \
            else points(shape, **scale)
    return st.fixed_dictionaries(parts)


def random_trees(*, max_leaves=5, max_side=4, **scale):
    """Nested dict / list structures of well-scaled arrays, for testing code that walks trees."""
    leaf = hnp.array_shapes(min_dims=1, max_dims=2, max_side=max_side).flatmap(
        lambda shape: points(shape, **scale))
    return st.recursive(leaf, lambda kids: st.one_of(
        st.lists(kids, min_size=1, max_size=3),
        st.dictionaries(st.sampled_from(["W", "b", "gain", "bias", "layers"]), kids,
                        min_size=1, max_size=3)), max_leaves=max_leaves)
