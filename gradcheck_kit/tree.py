"""Stage 1, tree: parameter structures <-> one float64 vector.

A parameter tree is an ndarray of any shape, a Python or numpy float, a 0-d
array, or a dict / list / tuple nest of those.  `flatten` turns it into one
float64 vector plus a `Layout` that knows every leaf's place, shape and dtype;
`rebuild` turns a vector (or a batch of vectors) back into the same structure,
with fresh arrays, for each call of the cost.

Refused, with a message naming the leaf: integer, boolean and complex leaves;
masked arrays (a mask would be lost: every entry would be stepped and handed to
the cost unmasked; pass `.filled(value)` or `.compressed()` and apply the mask in
the cost) and np.matrix (the cost would receive ndarrays); and two leaves whose
names coincide (keys 1 and '1', or 'a.b' beside {'a': {'b': ...}}), which
reports and `coordinates=` could not tell apart.  The caller's arrays are only read.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np

from .errors import CheckInputError, CheckTypeError

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

    @cached_property
    def starts(self) -> np.ndarray:
        """The first flat position of every leaf (computed once per layout)."""
        return np.array([leaf.offset for leaf in self.leaves], dtype=np.int64)


def _leaf_name(path: tuple) -> str:
    return ".".join(str(p) for p in path) if path else ROOT_NAME


def _describe(value: Any) -> str:
    dtype = getattr(value, "dtype", None)
    return f"dtype {dtype}" if dtype is not None else f"type {type(value).__name__}"


def _refuse_array_subclass(value: Any, name: str, what: str) -> None:
    """Masked arrays and np.matrix are refused rather than silently turned into plain
    arrays: a mask would be lost (every entry, masked or not, would be stepped and
    handed to the cost unmasked), and a matrix would come back as an ndarray, on
    which * and ** mean something else."""
    if isinstance(value, np.ma.MaskedArray):
        raise CheckTypeError(
            f"{what} leaf '{name}' is a masked array; masks are not supported, and dropping "
            "the mask would check and pass on the masked entries too: pass the data without "
            "the mask, e.g. .filled(value) for the whole array or .compressed() for the "
            "unmasked entries, and apply the mask inside the cost")
    if isinstance(value, np.matrix):
        raise CheckTypeError(
            f"{what} leaf '{name}' is a numpy matrix; expected an ndarray (np.asarray(m)): "
            "the cost would receive ndarrays, on which * is not the matrix product")


def _path_text(what: str, path: tuple) -> str:
    """A leaf's place written as Python would index it: params['a'][0]."""
    return what + "".join(f"[{key!r}]" for key in path)


def _refuse_shared_names(what: str, paths: list) -> None:
    """Two leaves with one name (keys 1 and '1', or 'a.b' beside {'a': {'b': ...}}) would
    be two coordinates that reports, coordinates= and gradients cannot tell apart."""
    seen = {}
    for path in paths:
        name = _leaf_name(path)
        if name in seen:
            raise CheckInputError(
                f"{what}: {_path_text(what, seen[name])} and {_path_text(what, path)} would both "
                f"be named '{name}' (names join the keys with '.'), so reports and "
                "coordinates= could not tell them apart; rename one of the keys")
        seen[name] = path


def _check_leaf(value: Any, path: tuple, what: str) -> tuple:
    """Return (array, kind) for a float leaf, else raise naming the leaf."""
    name = _leaf_name(path)
    _refuse_array_subclass(value, name, what)
    if isinstance(value, (bool, np.bool_)) or isinstance(value, (int, np.integer)):
        raise CheckTypeError(
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
            raise CheckTypeError(
                f"{what} leaf '{name}' is an integer or boolean array ({value.dtype}); gradients "
                "need floating-point leaves: convert it with .astype(float)")
        if np.issubdtype(value.dtype, np.complexfloating):
            raise CheckTypeError(
                f"{what} leaf '{name}' is complex ({value.dtype}); only real parameters are "
                "checked (split real and imaginary parts into two real leaves)")
        raise CheckTypeError(
            f"{what} leaf '{name}' has {value.dtype} entries; expected a floating-point array "
            "(use .astype(float))")
    if isinstance(value, (complex, np.complexfloating)):
        raise CheckTypeError(f"{what} leaf '{name}' is complex; only real parameters are checked")
    # A callable where values belong is most often the gradient passed in params' place:
    # the arguments are (cost, params, gradient).
    swapped = " (is the gradient function in params' place? the order is cost, params, " \
        "gradient)" if callable(value) and what == "params" and not path else ""
    where = f"{what} leaf '{name}'" if path else what
    raise CheckTypeError(
        f"{where} is a {type(value).__name__}; expected a float, a float ndarray, "
        f"or a dict / list / tuple of those{swapped}")


def _as_values(value: Any, path: tuple, what: str) -> tuple:
    """Leaf of a gradient or step tree: any real numbers (ints too) will do."""
    _refuse_array_subclass(value, _leaf_name(path), what)
    array = np.asarray(value)
    if not (np.issubdtype(array.dtype, np.floating) or np.issubdtype(array.dtype, np.integer)
            or array.dtype == np.bool_):
        raise CheckTypeError(f"{what} leaf '{_leaf_name(path)}' has {_describe(value)}; "
                             "expected real numbers")
    return array.astype(np.float64, copy=False), "array"


def _walk(tree: Any, path: tuple, leaves: list, what: str, leaf_check=_check_leaf):
    """Depth-first walk collecting leaves; returns the skeleton of this subtree."""
    if isinstance(tree, dict):
        keys = list(tree.keys())
        children = [_walk(tree[k], path + (k,), leaves, what, leaf_check) for k in keys]
        return ("dict", type(tree), keys, children)
    if isinstance(tree, (list, tuple)):
        # A namedtuple's leaves are named by field (q.slope[1]); other sequences by position.
        keys = getattr(tree, "_fields", None) or range(len(tree))
        children = [_walk(v, path + (k,), leaves, what, leaf_check) for k, v in zip(keys, tree)]
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
    _refuse_shared_names(what, [path for path, _, _ in found])
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


def _outline(skeleton, leaves) -> str:
    """The top of a structure in words, for messages: 'a bare array', 'a dict with keys
    ['a', 'b'] (leaves ...)'."""
    if skeleton[0] == "leaf":
        return "a bare array"
    top = f"a {skeleton[1].__name__}"
    top += f" with keys {list(map(str, skeleton[2]))}" if skeleton[0] == "dict" else \
        f" of {len(skeleton[3])} items"
    return f"{top} (leaves {leaves})"


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
    # Sequences match by position: a plain tuple for a namedtuple's fields is the same
    # structure, though the namedtuple's leaves are named by field.
    same = [_leaf_name(_by_position(leaf.path, layout.skeleton)) for leaf in layout.leaves] == \
        [_leaf_name(_by_position(p, skeleton)) for p, _, _ in found]
    if _shape_of(skeleton) != _shape_of(layout.skeleton) or not same:
        raise CheckInputError(
            f"{what} has a different structure from params: expected "
            f"{_outline(layout.skeleton, expected)}, got {_outline(skeleton, got)}")
    vector = np.empty(layout.size, dtype=np.float64)
    for leaf, (_, array, _) in zip(layout.leaves, found):
        if tuple(array.shape) != leaf.shape:
            raise CheckInputError(
                f"{what} for parameter '{leaf.name}': expected shape {leaf.shape}, "
                f"got {tuple(array.shape)}")
        vector[leaf.offset:leaf.offset + leaf.size] = np.ravel(array)
    return vector


def _by_position(path: tuple, skeleton) -> tuple:
    """The path with a namedtuple's field names replaced by their positions."""
    out, node = [], skeleton
    for key in path:
        if node[0] == "seq":
            fields = getattr(node[1], "_fields", None)
            position = fields.index(key) if fields and key in fields else key
            out.append(position)
            node = node[3][position]
        elif node[0] == "dict":
            out.append(key)
            node = node[3][node[2].index(key)]
        else:
            break
    return tuple(out)


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

    Where every leaf is a float64 array, each leaf is a reshaped view of the vector in
    both the real and the complex case (complex128 is what `rebuild` gives a float64
    leaf at a complex point): a bare array parameter, the commonest case, is one
    reshape and nothing more.  Other layouts go through `rebuild`.

    Examples
    --------
    >>> _, layout = flatten({"W": np.zeros((2, 2)), "b": np.zeros(1)})
    >>> build = rebuilder(layout)
    >>> build(np.arange(5.0))["W"].tolist()
    [[0.0, 1.0], [2.0, 3.0]]
    """
    if all(leaf.kind == "array" and leaf.dtype == np.float64 for leaf in layout.leaves):
        if layout.skeleton[0] == "leaf":
            shape = layout.leaves[0].shape
            return lambda vector: vector.reshape(shape)
        spans = [(leaf.offset, leaf.offset + leaf.size, leaf.shape) for leaf in layout.leaves]
        skeleton = layout.skeleton
        return lambda vector: assemble(skeleton, [vector[lo:hi].reshape(shape)
                                                  for lo, hi, shape in spans])
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


def leaf_and_index(layout: Layout, flat_index: int) -> tuple:
    """(leaf, index tuple within the leaf) of a flat position.

    Examples
    --------
    >>> _, layout = flatten({"W": np.zeros((2, 3)), "b": np.zeros(2)})
    >>> leaf, index = leaf_and_index(layout, 4)
    >>> leaf.name, index
    ('W', (1, 1))
    """
    starts = layout.starts
    k = int(np.searchsorted(starts, flat_index, side="right") - 1)
    leaf = layout.leaves[k]
    local = flat_index - leaf.offset
    index = tuple(int(i) for i in np.unravel_index(local, leaf.shape)) if leaf.shape else ()
    return leaf, index


def leaves_and_indices(layout: Layout, flat_indices) -> tuple:
    """`leaf_and_index` for many flat positions at once, without a Python loop over them.

    Parameters
    ----------
    layout : Layout
    flat_indices : array_like of int, shape (k,)

    Returns
    -------
    (ndarray of int, list of ndarray)
        The leaf number of each position, and for each dimension of the index within
        its leaf one int array (positions in leaves of fewer dimensions hold 0 there;
        read only the first `len(leaf.shape)` of them).

    Examples
    --------
    >>> _, layout = flatten({"W": np.zeros((2, 3)), "b": np.zeros(2)})
    >>> numbers, index = leaves_and_indices(layout, [4, 6])
    >>> numbers.tolist(), [i.tolist() for i in index]
    ([0, 1], [[1, 0], [1, 0]])
    """
    flat = np.asarray(flat_indices, dtype=np.int64).reshape(-1)
    numbers = np.searchsorted(layout.starts, flat, side="right") - 1
    dims = max((len(leaf.shape) for leaf in layout.leaves), default=0)
    index = [np.zeros(flat.size, dtype=np.int64) for _ in range(dims)]
    for k in np.unique(numbers).tolist():
        leaf = layout.leaves[k]
        if not leaf.shape:
            continue
        mine = numbers == k
        parts = np.unravel_index(flat[mine] - leaf.offset, leaf.shape)
        for d, part in enumerate(parts):
            index[d][mine] = part
    return numbers, index


# Up to this many positions, entry_names names them one by one (numpy's per-call cost
# exceeds the loop's).
FEW_ENTRIES = 32


def entry_names(layout: Layout, flat_indices) -> tuple:
    """(names, leaf names, index tuples) of many flat positions, as `entry_name` writes
    them, computed a leaf at a time.

    Examples
    --------
    >>> _, layout = flatten({"W": np.zeros((2, 3)), "b": np.zeros(2)})
    >>> entry_names(layout, [4, 6])
    (['W[1, 1]', 'b[0]'], ['W', 'b'], [(1, 1), (0,)])
    """
    flat = np.asarray(flat_indices, dtype=np.int64).reshape(-1)
    if flat.size <= FEW_ENTRIES:      # a handful of rows: the plain loop costs less
        found = [leaf_and_index(layout, i) for i in flat.tolist()]
        return ([entry_name(leaf, index) for leaf, index in found],
                [leaf.name for leaf, _ in found], [index for _, index in found])
    numbers, index = leaves_and_indices(layout, flat)
    names, leaf_names, tuples = [None] * numbers.size, [None] * numbers.size, \
        [None] * numbers.size
    for k in np.unique(numbers).tolist():
        leaf = layout.leaves[k]
        at = np.flatnonzero(numbers == k).tolist()
        if leaf.shape:
            parts = list(zip(*[index[d][at].tolist() for d in range(len(leaf.shape))]))
        else:
            parts = [()] * len(at)
        for j, part in zip(at, parts):
            names[j] = entry_name(leaf, part)
            leaf_names[j] = leaf.name
            tuples[j] = part
    return names, leaf_names, tuples


def entry_name(leaf: Leaf, index: tuple) -> str:
    """Readable name of one entry of a leaf: 'W[2, 1]', 'layers.0.b[3]', 'bias'."""
    return f"{leaf.name}[{', '.join(map(str, index))}]" if index else leaf.name


def coordinate_name(layout: Layout, flat_index: int) -> str:
    """Readable name of one coordinate of the flat vector (see entry_name)."""
    return entry_name(*leaf_and_index(layout, flat_index))


def leaf_of_each(layout: Layout) -> np.ndarray:
    """For every flat position, the number of its leaf."""
    return np.repeat(np.arange(len(layout.leaves)), [leaf.size for leaf in layout.leaves])


def leaf_eps(layout: Layout) -> np.ndarray:
    """Machine epsilon of each coordinate's own dtype."""
    return np.repeat([np.finfo(leaf.dtype).eps for leaf in layout.leaves],
                     [leaf.size for leaf in layout.leaves])
