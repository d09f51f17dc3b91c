"""The analytic side: the gradient the user claims, as one flat vector.

`gradient` may be a function of params (called on a private copy), an already
computed structure like params, or None, in which case autograd derives it
from the cost (which checks custom autograd rules).
"""
from __future__ import annotations

import numpy as np

from .errors import CheckInputError, CheckTypeError
from .tree import Layout, _outline, assemble, flatten_like, leaves_of, rebuild


def traced_rebuild(v, layout: Layout, batched: bool = False):
    """rebuild() for a vector autograd is tracing: slices and reshapes only.

    batched=True gives every leaf a leading batch axis of length 1."""
    import autograd.numpy as anp

    leaves = []
    for leaf in layout.leaves:
        seg = v[leaf.offset:leaf.offset + leaf.size]
        if batched:
            leaves.append(anp.reshape(seg, (1,) + leaf.shape))
        else:
            leaves.append(anp.reshape(seg, leaf.shape) if leaf.shape else seg[0])
    return assemble(layout.skeleton, leaves)


def autograd_gradient(cost, params, layout: Layout, base, vectorized=False):
    try:
        import autograd
    except ImportError as exc:  # pragma: no cover - autograd is a core dependency
        raise CheckInputError("gradient=None needs autograd: pip install autograd") from exc
    if vectorized:  # a batch of one, traced through the flat vector
        import autograd.numpy as anp

        def one(v):
            return anp.sum(cost(traced_rebuild(v, layout, batched=True)))
        return rebuild(autograd.grad(one)(base.copy()), layout)
    return autograd.grad(cost)(params)


def analytic_vector(cost, base: np.ndarray, layout: Layout, gradient, vectorized=False):
    """The analytic gradient flattened like params; clear errors for every misfit."""
    return analytic_values(cost, base, layout, gradient, vectorized)[0]


def precision_of(value) -> float:
    """The epsilon of the least precise floating-point leaf of a gradient value
    (float64's for plain Python numbers and non-float leaves)."""
    eps = float(np.finfo(np.float64).eps)
    for leaf in leaves_of(value):
        dtype = getattr(leaf, "dtype", None)
        if dtype is not None and np.issubdtype(dtype, np.floating):
            eps = max(eps, float(np.finfo(dtype).eps))
    return eps


def _expected_structure(layout: Layout) -> str:
    """What a gradient must look like, in words: 'an array of shape (3,)', 'a dict with
    keys [...] (leaves [...])'."""
    if layout.skeleton[0] == "leaf":
        shape = layout.leaves[0].shape
        return f"an array of shape {shape}" if shape else "a number"
    return _outline(layout.skeleton, [leaf.name for leaf in layout.leaves])


def analytic_values(cost, base: np.ndarray, layout: Layout, gradient, vectorized=False):
    """(the analytic gradient flattened like params, the precision of its values)."""
    params = rebuild(base.copy(), layout)
    if gradient is None:
        try:
            value = autograd_gradient(cost, params, layout, base, vectorized)
        except Exception as exc:
            raise CheckInputError(
                f"gradient=None: autograd could not differentiate the cost ({type(exc).__name__}: "
                f"{exc}). Write the cost with autograd.numpy, or pass gradient=") from exc
    elif callable(gradient):
        try:
            value = gradient(params)
        except Exception as exc:
            raise CheckInputError(
                f"gradient function raised {type(exc).__name__} at the base point: {exc}") from exc
        if value is None:
            raise CheckTypeError(
                "the gradient function returned None (a missing return statement?); expected "
                f"{_expected_structure(layout)}, like params")
    else:
        value = gradient
    if isinstance(value, (np.ndarray, float)) and np.size(value) == 1 and layout.size == 1:
        value = np.reshape(value, layout.leaves[0].shape) if layout.leaves[0].shape else value
    return flatten_like(value, layout, "gradient"), precision_of(value)
