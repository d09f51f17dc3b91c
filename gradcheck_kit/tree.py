"""Stage 1, tree: parameter structures <-> one float64 vector.

A parameter tree is an ndarray of any shape, a Python or numpy float, a 0-d
array, or a dict / list / tuple nest of those.  `flatten` turns it into one
float64 vector plus a `Layout` that knows every leaf's place, shape and dtype;
`rebuild` turns a vector (or a batch of vectors) back into the same structure,
with fresh arrays, for each call of the cost.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import CheckInputError

ROOT_NAME = "x"  # name of a parameter that is the whole tree (a bare array or float)


@dataclass(frozen=True)
class Leaf:
    path: tuple          # keys from the root: dict keys and sequence positions
    name: str            # 'layers.0.b'; ROOT_NAME for a bare leaf
    shape: tuple
    dtype: np.dtype      # the leaf's own float dtype, restored on rebuild
    kind: str            # 'array', 'numpy-scalar' or 'python-float'
    offset: int          # first position in the flat vector
    size: int


@dataclass(frozen=True)
class Layout:
    leaves: tuple
    skeleton: Any        # nested ('dict'|'seq', type, keys, children) / ('leaf', i)
    size: int

    @property
    def starts(self) -> np.ndarray:
        return np.array([leaf.offset for leaf in self.leaves])


def _leaf_name(path: tuple) -> str:
    return ".".join(str(p) for p in path) if path else ROOT_NAME


def _describe(value: Any) -> str:
    dtype = getattr(value, "dtype", None)
    return f"dtype {dtype}" if dtype is not None else f"type {type(value).__name__}"


def _check_leaf(value: Any, path: tuple, what: str) -> tuple:
    """Return (array, kind) for a float leaf, else raise naming the leaf."""
    name = _leaf_name(path)
    if isinstance(value, (bool, np.bool_)) or isinstance(value, (int, np.integer)):
        raise CheckInputError(
            f"{what} leaf '{name}' is an integer or boolean ({_describe(value)}); "
            "gradients need floating-point leaves: convert it with float(...) or .astype(float)")
    if isinstance(value, float):
        return np.asarray(value, dtype=np.float64), "python-float"
    if isinstance(value, np.floating):
        return np.asarray(value), "numpy-scalar"
    if isinstance(value, np.ndarray):
        if np.issubdtype(value.dtype, np.floating):
            return value, "array"
        if np.issubdtype(value.dtype, np.integer) or value.dtype == np.bool_:
            raise CheckInputError(
                f"{what} leaf '{name}' is an integer or boolean array ({value.dtype}); gradients "
                "need floating-point leaves: convert it with .astype(float)")
        if np.issubdtype(value.dtype, np.complexfloating):
            raise CheckInputError(
                f"{what} leaf '{name}' is complex ({value.dtype}); only real parameters are checked "
                "(split real and imaginary parts into two real leaves)")
        raise CheckInputError(
            f"{what} leaf '{name}' has {value.dtype} entries; expected a floating-point array "
            "(use .astype(float))")
    if isinstance(value, (complex, np.complexfloating)):
        raise CheckInputError(f"{what} leaf '{name}' is complex; only real parameters are checked")
    raise CheckInputError(
        f"{what} leaf '{name}' is a {type(value).__name__}; expected a float, a float ndarray, "
        "or a dict / list / tuple of those")


def _as_values(value: Any, path: tuple, what: str) -> tuple:
    """Leaf of a gradient or step tree: any real numbers (ints too) will do."""
    array = np.asarray(value)
    if not (np.issubdtype(array.dtype, np.floating) or np.issubdtype(array.dtype, np.integer)
            or array.dtype == np.bool_):
        raise CheckInputError(f"{what} leaf '{_leaf_name(path)}' has {_describe(value)}; "
                              "expected real numbers")
    return array.astype(np.float64, copy=False), "array"


def _walk(tree: Any, path: tuple, leaves: list, what: str, leaf_check=_check_leaf):
    """Depth-first walk collecting leaves; returns the skeleton of this subtree."""
    if isinstance(tree, dict):
        keys = list(tree.keys())
        children = [_walk(tree[k], path + (k,), leaves, what, leaf_check) for k in keys]
        return ("dict", type(tree), keys, children)
    if isinstance(tree, (list, tuple)):
        children = [_walk(v, path + (i,), leaves, what, leaf_check) for i, v in enumerate(tree)]
        return ("seq", type(tree), None, children)
    array, kind = leaf_check(tree, path, what)
    leaves.append((path, array, kind))
    return ("leaf", len(leaves) - 1)


def flatten(params: Any, what: str = "params") -> tuple:
    """Return (vector, layout): a new float64 vector and the way back.

    The caller's arrays are only read.  `what` names the argument in errors.
    """
    found: list = []
    skeleton = _walk(params, (), found, what)
    if not found:
        raise CheckInputError(f"{what} holds no parameters (an empty {type(params).__name__})")
    leaves, offset = [], 0
    for path, array, kind in found:
        leaves.append(Leaf(path, _leaf_name(path), tuple(array.shape), array.dtype, kind,
                           offset, int(array.size)))
        offset += int(array.size)
    if offset == 0:
        raise CheckInputError(f"{what} holds no parameters: every array in it is empty")
    vector = np.empty(offset, dtype=np.float64)
    for leaf, (_, array, _) in zip(leaves, found):
        vector[leaf.offset:leaf.offset + leaf.size] = np.ravel(array)
    return vector, Layout(tuple(leaves), skeleton, offset)


def flatten_like(tree: Any, layout: Layout, what: str) -> np.ndarray:
    """Flatten `tree`, which must have the structure and shapes of `layout`.

    Used for gradients and step structures; a mismatch names the parameter,
    the expected and the received shape or structure.
    """
    found: list = []
    if layout.skeleton[0] == "leaf" and isinstance(tree, (list, tuple)):
        tree = np.asarray(tree)  # a bare-array parameter may get a list back
    tree = _in_key_order(tree, layout.skeleton)
    skeleton = _walk(tree, (), found, what, _as_values)
    expected = [leaf.name for leaf in layout.leaves]
    got = [_leaf_name(p) for p, _, _ in found]
    if _shape_of(skeleton) != _shape_of(layout.skeleton) or expected != got:
        raise CheckInputError(
            f"{what} has a different structure from params: expected leaves {expected}, got {got}")
    vector = np.empty(layout.size, dtype=np.float64)
    for leaf, (_, array, _) in zip(layout.leaves, found):
        if tuple(array.shape) != leaf.shape:
            raise CheckInputError(
                f"{what} for parameter '{leaf.name}': expected shape {leaf.shape}, "
                f"got {tuple(array.shape)}")
        vector[leaf.offset:leaf.offset + leaf.size] = np.ravel(array)
    return vector


def _in_key_order(tree, skeleton):
    """Dicts reordered to the keys' order in params: a gradient {'b', 'W'} matches params
    {'W', 'b'}; anything that does not match is left for the structure check to name."""
    if skeleton[0] == "dict" and isinstance(tree, dict) and set(tree) == set(skeleton[2]):
        return {k: _in_key_order(tree[k], child) for k, child in zip(skeleton[2], skeleton[3])}
    if skeleton[0] == "seq" and isinstance(tree, (list, tuple)) and len(tree) == len(skeleton[3]):
        return [_in_key_order(v, child) for v, child in zip(tree, skeleton[3])]
    return tree


def _shape_of(skeleton):
    """The skeleton without container types, so a tuple gradient matches list params."""
    if skeleton[0] == "leaf":
        return "leaf"
    return (skeleton[0], tuple(map(str, skeleton[2])) if skeleton[2] is not None else None,
            tuple(_shape_of(c) for c in skeleton[3]))


def _leaf_value(segment: np.ndarray, leaf: Leaf, batched: bool):
    """One leaf from its slice of the vector, in the leaf's own dtype and kind."""
    if np.iscomplexobj(segment):
        dtype = np.result_type(leaf.dtype, np.complex64)
    else:
        dtype = leaf.dtype
    shape = (segment.shape[0],) + leaf.shape if batched else leaf.shape
    value = segment.reshape(shape)
    if value.dtype != dtype:
        value = value.astype(dtype)
    if batched or leaf.kind == "array":
        return value
    if leaf.kind == "python-float":
        return value.item()
    return value[()]  # numpy scalar of the leaf's dtype


def rebuild(vector: np.ndarray, layout: Layout, batched: bool = False) -> Any:
    """The parameter structure holding the values of `vector`.

    `vector` has shape (n,) or, with batched=True, (m, n): then every leaf gets
    a leading batch axis of length m (scalars become 1-d arrays).  Leaves are
    views into `vector`; callers pass a vector of their own.
    """
    values = [_leaf_value(vector[..., leaf.offset:leaf.offset + leaf.size], leaf, batched)
              for leaf in layout.leaves]
    return assemble(layout.skeleton, values)


def rebuilder(layout: Layout, complex_values: bool = False):
    """A function vector -> params for one layout, the hot path of serial evaluation.

    A bare float64 array parameter, the commonest case, is a reshape and nothing more.
    """
    if not complex_values and layout.skeleton[0] == "leaf":
        leaf = layout.leaves[0]
        if leaf.kind == "array" and leaf.dtype == np.float64:
            shape = leaf.shape
            return lambda vector: vector.reshape(shape)
    return lambda vector: rebuild(vector, layout)


def assemble(skeleton, values):
    """The structure of `skeleton` with its leaves taken from `values`, in order."""
    if skeleton[0] == "leaf":
        return values[skeleton[1]]
    _, kind_type, keys, children = skeleton
    built = [assemble(c, values) for c in children]
    if keys is not None:
        pairs = zip(keys, built)
        return dict(pairs) if kind_type is dict else kind_type(pairs)
    if kind_type in (list, tuple):
        return kind_type(built)
    if hasattr(kind_type, "_fields"):  # namedtuple
        return kind_type(*built)
    return kind_type(built)


def leaves_of(tree) -> list:
    """The leaves of any dict / list / tuple nest, depth first (no checks)."""
    if isinstance(tree, dict):
        return [x for v in tree.values() for x in leaves_of(v)]
    if isinstance(tree, (list, tuple)):
        return [x for v in tree for x in leaves_of(v)]
    return [tree]


def locate(layout: Layout, flat_index: int) -> tuple:
    """(leaf, index tuple within the leaf) of a flat position."""
    starts = layout.starts
    k = int(np.searchsorted(starts, flat_index, side="right") - 1)
    leaf = layout.leaves[k]
    local = flat_index - leaf.offset
    index = tuple(int(i) for i in np.unravel_index(local, leaf.shape)) if leaf.shape else ()
    return leaf, index


def entry_name(leaf: Leaf, index: tuple) -> str:
    """Readable name of one entry of a leaf: 'W[2, 1]', 'layers.0.b[3]', 'bias'."""
    return f"{leaf.name}[{', '.join(map(str, index))}]" if index else leaf.name


def coordinate_name(layout: Layout, flat_index: int) -> str:
    """Readable name of one coordinate of the flat vector (see entry_name)."""
    return entry_name(*locate(layout, flat_index))


def leaf_of_each(layout: Layout) -> np.ndarray:
    """For every flat position, the number of its leaf."""
    return np.repeat(np.arange(len(layout.leaves)), [leaf.size for leaf in layout.leaves])


def leaf_eps(layout: Layout) -> np.ndarray:
    """Machine epsilon of each coordinate's own dtype."""
    return np.repeat([np.finfo(leaf.dtype).eps for leaf in layout.leaves],
                     [leaf.size for leaf in layout.leaves])
