"""gradcheck_kit.strategies: drawn points are well scaled and trees are usable params."""
import numpy as np
from hypothesis import given

import gradcheck_kit as gk
from gradcheck_kit import strategies as gst
from gradcheck_kit.tree import flatten


@given(gst.points((4, 2), smallest=0.1, largest=10.0))
def test_points_stay_within_their_magnitudes(x):
    nonzero = x[x != 0]
    assert x.shape == (4, 2) and np.all(np.isfinite(x))
    assert np.all((np.abs(nonzero) >= 0.1) & (np.abs(nonzero) <= 10.0))


@given(gst.points((3,), signs="negative", zero=False))
def test_signs_can_be_fixed(x):
    assert np.all(x < 0)


@given(gst.parameter_trees({"W": (2, 3), "bias": ()}, largest=5.0))
def test_parameter_trees_have_the_requested_shapes(p):
    assert p["W"].shape == (2, 3) and isinstance(p["bias"], float)
    assert gk.compare_gradient(lambda q: np.sum(q["W"] ** 2) + q["bias"] ** 2, p,
                               lambda q: {"W": 2 * q["W"], "bias": 2 * q["bias"]}).passed


@given(gst.random_trees(max_leaves=4))
def test_random_trees_flatten(tree):
    vector, layout = flatten(tree)
    assert vector.size == layout.size > 0 and np.all(np.isfinite(vector))
