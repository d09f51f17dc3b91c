"""Parameter trees: flatten / rebuild round trips, names, dtypes and clear errors."""
import copy

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from gradcheck_kit import CheckInputError
from gradcheck_kit.tree import coordinate_name, flatten, flatten_like, leaves_of, rebuild

float_dtypes = st.sampled_from([np.float16, np.float32, np.float64])
arrays = float_dtypes.flatmap(lambda dt: hnp.arrays(
    dt, hnp.array_shapes(min_dims=0, max_dims=3, min_side=1, max_side=4),
    elements=st.floats(-1e3, 1e3, width=16)))
leaves = st.one_of(arrays, st.floats(-1e6, 1e6), st.floats(-10, 10).map(np.float32))
trees = st.recursive(
    leaves,
    lambda kids: st.one_of(st.lists(kids, min_size=1, max_size=3),
                           st.tuples(kids, kids),
                           st.dictionaries(st.text("abcdef", min_size=1, max_size=3), kids,
                                           min_size=1, max_size=3)),
    max_leaves=6)


def same_tree(a, b):
    if isinstance(a, dict):
        return type(a) is type(b) and list(a) == list(b) and all(same_tree(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return type(a) is type(b) and len(a) == len(b) and all(map(same_tree, a, b))
    if isinstance(a, np.ndarray):
        return isinstance(b, np.ndarray) and a.dtype == b.dtype and a.shape == b.shape \
            and np.array_equal(a, b)
    return type(a) is type(b) and a == b


@given(trees)
def test_flatten_then_rebuild_gives_the_same_tree(tree):
    vector, layout = flatten(tree)
    assert vector.dtype == np.float64 and vector.size == layout.size
    assert same_tree(tree, rebuild(vector.copy(), layout))


@given(trees)
def test_flatten_does_not_change_the_tree(tree):
    # The snapshot is taken with copy.deepcopy, independent of the code under test.
    snapshot = copy.deepcopy(tree)
    vector, layout = flatten(tree)
    vector[:] = 12345.0  # writing the vector must not reach the caller's arrays
    assert same_tree(tree, snapshot)
    rebuilt = rebuild(vector, layout)
    for leaf in leaves_of(rebuilt):  # nor writing the rebuilt leaves
        if isinstance(leaf, np.ndarray):
            leaf[...] = -1.0
    assert same_tree(tree, snapshot)


@given(trees)
def test_rebuilt_leaves_are_fresh_arrays(tree):
    vector, layout = flatten(tree)
    rebuilt = rebuild(vector.copy(), layout)
    for leaf_in, leaf_out in zip(leaves_of(tree), leaves_of(rebuilt)):
        if isinstance(leaf_in, np.ndarray):
            assert not np.shares_memory(leaf_in, leaf_out)


def test_coordinate_names_are_readable():
    tree = {"W": np.zeros((3, 2)), "layers": [{"b": np.zeros(4)}], "bias": 0.5}
    _, layout = flatten(tree)
    names = [coordinate_name(layout, i) for i in range(layout.size)]
    assert names[:2] == ["W[0, 0]", "W[0, 1]"]
    assert "W[2, 1]" in names and "layers.0.b[3]" in names and names[-1] == "bias"


def test_bare_array_is_named_x():
    _, layout = flatten(np.zeros(3))
    assert coordinate_name(layout, 2) == "x[2]"


def test_batched_rebuild_adds_a_leading_axis():
    tree = {"W": np.zeros((2, 3), dtype=np.float32), "b": 1.0}
    vector, layout = flatten(tree)
    batch = np.tile(vector, (5, 1))
    out = rebuild(batch, layout, batched=True)
    assert out["W"].shape == (5, 2, 3) and out["W"].dtype == np.float32
    assert out["b"].shape == (5,)


@pytest.mark.parametrize("leaf, words", [
    (np.arange(3), "integer"), (3, "integer"), (True, "integer"),
    (np.zeros(2, dtype=complex), "complex"), (np.array(["a"]), "entries"),
    ("text", "str"), (None, "NoneType")])
def test_unusable_leaves_are_named(leaf, words):
    with pytest.raises(CheckInputError) as info:
        flatten({"layer": {"count": leaf}})
    assert "layer.count" in str(info.value) and words in str(info.value)


@pytest.mark.parametrize("tree", [{}, [], (), {"a": []}, np.zeros(0)])
def test_empty_trees_are_refused(tree):
    with pytest.raises(CheckInputError, match="no parameters"):
        flatten(tree)


def test_flatten_like_names_the_parameter_and_the_shapes():
    _, layout = flatten({"W": np.zeros((3, 2)), "b": np.zeros(2)})
    with pytest.raises(CheckInputError) as info:
        flatten_like({"W": np.zeros((2, 3)), "b": np.zeros(2)}, layout, "gradient")
    msg = str(info.value)
    assert "'W'" in msg and "(3, 2)" in msg and "(2, 3)" in msg
    with pytest.raises(CheckInputError, match="structure"):
        flatten_like({"W": np.zeros((3, 2))}, layout, "gradient")
