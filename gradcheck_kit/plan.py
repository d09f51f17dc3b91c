"""Stage 2, plan: which coordinates, which stencil, which steps.

Everything here is decided before the numeric derivatives are evaluated: the
method name is checked, the coordinates to examine are chosen (all, a sample
per parameter, or lists), the steps are set and turned into evaluation
requests for the evaluate stage.
"""
from __future__ import annotations

import numbers

import numpy as np

from .errors import CheckInputError
from .stencils import METHODS, OFFSETS, default_steps
from .tree import Layout, flatten_like

METHOD_CHOICES = METHODS + ("auto",)


def check_method(method, allowed=METHOD_CHOICES) -> str:
    if method not in allowed:
        raise CheckInputError(f"method: expected one of {', '.join(map(repr, allowed))}, "
                              f"got {method!r}")
    return method


def check_tolerance(value, name):
    """rtol / atol: None or a finite number >= 0."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not np.isfinite(value) \
            or value < 0:
        raise CheckInputError(f"{name}: expected a finite number >= 0 or None, got {value!r}")
    return float(value)


def check_flags(*, seed=None, progress=None, vectorized=False, complex_safe=None,
                allow_undecided=False) -> None:
    """seed: None or an int; progress, complex_safe: None or a bool; the rest bools."""
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, numbers.Integral)):
        raise CheckInputError(f"seed: expected an int or None, got {seed!r}")
    if progress is not None and not isinstance(progress, bool):
        raise CheckInputError(f"progress: expected True, False or None, got {progress!r}")
    if complex_safe is not None and not isinstance(complex_safe, bool):
        raise CheckInputError(f"complex_safe: expected True, False or None, got {complex_safe!r}")
    for name, value in (("vectorized", vectorized), ("allow_undecided", allow_undecided)):
        if not isinstance(value, bool):
            raise CheckInputError(f"{name}: expected True or False, got {value!r}")


def _leaf_indices(leaf, spec, name):
    """Flat positions (within the leaf) named by a list of ints or index tuples."""
    out = []
    for item in spec:
        if isinstance(item, (tuple, list)):
            if len(item) != len(leaf.shape):
                raise CheckInputError(
                    f"coordinates for '{name}': index {tuple(item)} has {len(item)} entries, "
                    f"the parameter has shape {leaf.shape}")
            try:
                out.append(int(np.ravel_multi_index(tuple(int(i) for i in item), leaf.shape)))
            except ValueError as exc:
                raise CheckInputError(f"coordinates for '{name}': index {tuple(item)} is out of "
                                      f"range for shape {leaf.shape}") from exc
        elif isinstance(item, numbers.Integral) and not isinstance(item, bool):
            if not -leaf.size <= item < leaf.size:
                raise CheckInputError(f"coordinates for '{name}': flat index {item} is out of "
                                      f"range for {leaf.size} entries")
            out.append(int(item) % leaf.size)
        else:
            raise CheckInputError(f"coordinates for '{name}': expected ints or index tuples, "
                                  f"got {item!r}")
    return out


def choose_coordinates(layout: Layout, coordinates, seed, analytic: np.ndarray) -> np.ndarray:
    """Sorted flat indices to examine.

    None: all.  An int k: k per parameter, drawn under `seed`, with the entries of
    largest analytic magnitude always among them (half of the k, at least one),
    since a bug in a large entry matters most.  A dict {parameter name: [indices]}:
    those entries (flat ints or index tuples); unnamed parameters are skipped.
    """
    if coordinates is None:
        return np.arange(layout.size)
    if isinstance(coordinates, numbers.Integral) and not isinstance(coordinates, bool):
        k = int(coordinates)
        if k < 1:
            raise CheckInputError(f"coordinates: expected an int >= 1, got {k}")
        rng = np.random.default_rng(seed)
        chosen = []
        for leaf in layout.leaves:
            span = np.arange(leaf.offset, leaf.offset + leaf.size)
            if leaf.size <= k:
                chosen.append(span)
                continue
            n_top = max(1, k // 2)
            order = np.argsort(-np.abs(analytic[span]), kind="stable")
            top = span[order[:n_top]]
            rest = rng.choice(np.setdiff1d(span, top), size=k - n_top, replace=False)
            chosen.append(np.concatenate([top, rest]))
        return np.unique(np.concatenate(chosen))
    if isinstance(coordinates, dict):
        names = {leaf.name: leaf for leaf in layout.leaves}
        chosen = []
        for name, spec in coordinates.items():
            if name not in names:
                raise CheckInputError(f"coordinates: no parameter named {name!r}; parameters are "
                                      f"{sorted(names)}")
            leaf = names[name]
            chosen += [leaf.offset + i for i in _leaf_indices(leaf, spec, name)]
        if not chosen:
            raise CheckInputError("coordinates: the lists name no entry")
        return np.unique(np.array(chosen, dtype=int))
    raise CheckInputError(
        "coordinates: expected None (all), an int k (k per parameter) or a dict "
        f"{{parameter name: [indices]}}, got {type(coordinates).__name__}")


def steps(method: str, base: np.ndarray, layout: Layout, step, eps: np.ndarray) -> np.ndarray:
    """The step of every coordinate: automatic, one number for all, or a tree like params."""
    if step is None:
        return default_steps(method, base, eps)
    if isinstance(step, numbers.Real) and not isinstance(step, bool):
        h = np.full(base.size, float(step))
    else:
        h = flatten_like(step, layout, "step")
    if not np.all(np.isfinite(h) & (h > 0)):
        raise CheckInputError("step: every step must be a finite number > 0")
    return h


def requests(method: str, coords: np.ndarray, h: np.ndarray) -> tuple:
    """(where, amounts): for each coordinate, its stencil's offsets in order."""
    offsets = OFFSETS[method]
    where = np.repeat(coords, len(offsets)).tolist()
    amounts = (h[coords][:, None] * np.array(offsets)[None, :]).ravel().tolist()
    return where, amounts
