"""gradcheck_kit.strategies: bad bounds and sign choices are named; drawn values keep
their promises (sign, magnitude, no zero when asked)."""
import numpy as np
import pytest
from hypothesis import given, settings

from gradcheck_kit import strategies as gst


@pytest.mark.parametrize("options, message", [
    ({"smallest": 0.0}, "expected 0 < smallest <= largest"),
    ({"smallest": 2.0, "largest": 1.0}, "expected 0 < smallest <= largest"),
    ({"signs": "mixed"}, "signs must be 'both', 'positive' or 'negative'"),
])
def test_bad_scalar_options_are_named(options, message):
    with pytest.raises(ValueError, match=message):
        gst.scalars(**options)


@settings(max_examples=30, deadline=None)
@given(gst.scalars(smallest=0.5, largest=4.0, signs="positive"))
def test_positive_scalars_are_positive_and_in_range(x):
    assert 0.5 <= x <= 4.0


@settings(max_examples=30, deadline=None)
@given(gst.points((3,), smallest=0.1, largest=10.0, signs="negative"))
def test_negative_points_are_negative_and_in_range(x):
    assert x.shape == (3,)
    assert np.all((-10.0 <= x) & (x <= -0.1))


@settings(max_examples=30, deadline=None)
@given(gst.scalars(smallest=1.0, largest=2.0, zero=False))
def test_zero_false_never_draws_zero(x):
    assert 1.0 <= abs(x) <= 2.0
