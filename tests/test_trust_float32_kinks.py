"""Kinks near the point in a float32 cost: no false alarm, planted errors still caught.

A float32 leaky-ReLU network whose pre-activations lie 1e-5 to 5e-3 from 0.  float32's
steps are about 4e-3 long, so central stencils cross those kinks, and their error
bounds (a smooth cost's) do not cover what a kink does: a correct gradient disagreed on
nearly every draw (28 of 30 random placements, every method).  The noise lines crossed
the kinks too, and their level, read as noise, loosened every estimate.  The gradient
formulas are the standard backpropagation ones (common practice).  What is pinned:

* a correct gradient passes, for every method, wherever the kinks are placed;
* rows that no difference can decide at float32's precision are undecided, with their
  own note, never 'disagree';
* wrong gradients are still caught: a 1% error in the output weights, a sign error, a
  scaled layer;
* smooth float32 costs whose values jitter by an ulp or two along a line are not taken
  for quantized (piecewise-constant) ones, while a float32 cost rounded to a grid is.
"""
import numpy as np
import pytest

import gradcheck_kit as gk

ALPHA = 0.05
F32 = np.float32


def _net(seed, dists):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(12, 4)).astype(F32)
    y = rng.normal(size=12).astype(F32)
    W1 = rng.normal(size=(4, 6)).astype(F32)
    b1 = (rng.normal(size=6) * 0.1).astype(F32)
    W2 = rng.normal(size=6).astype(F32)
    Z = X @ W1 + b1
    # Three pre-activations moved next to their kink, `dists` from 0.
    b1[0] -= Z[0, 0] - F32(dists[0])
    b1[2] -= Z[1, 2] - F32(dists[1])
    b1[4] -= Z[5, 4] - F32(dists[2])

    def cost(p):
        z = X @ p["W1"] + p["b1"]
        a = np.where(z > 0, z, ALPHA * z)
        return F32(0.5) * np.mean((a @ p["W2"] - y) ** 2)

    def gradient(p):
        z = X @ p["W1"] + p["b1"]
        a = np.where(z > 0, z, ALPHA * z)
        r = (a @ p["W2"] - y) / F32(len(y))
        ga = np.outer(r, p["W2"]) * np.where(z > 0, F32(1), F32(ALPHA))
        return {"W1": X.T @ ga, "b1": ga.sum(0), "W2": a.T @ r}

    return cost, gradient, {"W1": W1, "b1": b1, "W2": W2}


FIXED = (3e-4, -1e-3, 5e-5)


def _random_dists(draw):
    rng = np.random.default_rng(1000 + draw)
    return tuple(rng.choice([-1, 1]) * 10 ** rng.uniform(-5, -2.3, size=3))


@pytest.mark.parametrize("method", ["central", "five-point", "richardson", "auto"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_correct_float32_relu_net_beside_its_kinks_passes(method, seed):
    cost, gradient, params = _net(seed, FIXED)
    report = gk.compare_gradient(cost, params, gradient, method=method)
    assert report.passed, report.to_text()
    assert not report.mismatches, report.to_text()


@pytest.mark.parametrize("draw", range(6))
def test_a_correct_float32_relu_net_passes_wherever_its_kinks_lie(draw):
    cost, gradient, params = _net(20 + draw, _random_dists(draw))
    report = gk.compare_gradient(cost, params, gradient)
    assert report.passed, report.to_text()


def test_rows_no_difference_can_decide_are_undecided_with_their_own_note():
    undecided = []
    for draw in range(6):
        cost, gradient, params = _net(20 + draw, _random_dists(draw))
        report = gk.compare_gradient(cost, params, gradient)
        rows = [r for r in report.rows if r.verdict == "noisy"]
        if rows:
            undecided.append(report)
            assert all(r.detail.startswith("undecided: ") and "kink" in r.detail
                       for r in rows), report.to_text()
            note = [n for n in report.notes if "could not be decided" in n]
            assert note and "kinks lie near the point" in note[0], report.notes
            assert "float64" in note[0]
            # The noise note speaks of noise: it does not claim these rows.
            assert not any("noise" in n and any(r.name in n for r in rows)
                           for n in report.notes if n not in note), report.notes
    assert undecided, "no draw left a row undecided: the test no longer tests the note"


def _scaled(gradient, edit):
    def wrong(p):
        g = {k: np.array(v, copy=True) for k, v in gradient(p).items()}
        edit(g)
        return g
    return wrong


PLANTED = {
    "output weights 1% off": lambda g: g.__setitem__("W2", g["W2"] * F32(1.01)),
    "output weights 0.1% off": lambda g: g.__setitem__("W2", g["W2"] * F32(1.001)),
    "a bias entry with the wrong sign": lambda g: g["b1"].__setitem__(3, -g["b1"][3]),
    "first layer 5% off": lambda g: g.__setitem__("W1", g["W1"] * F32(1.05)),
    "everything 0.3% off": lambda g: [g.__setitem__(k, v * F32(1.003))
                                      for k, v in list(g.items())],
}


@pytest.mark.parametrize("kind", sorted(PLANTED))
@pytest.mark.parametrize("method", ["central", "auto"])
def test_planted_errors_beside_float32_kinks_are_caught(kind, method):
    for seed in (0, 1):
        cost, gradient, params = _net(seed, FIXED)
        report = gk.compare_gradient(cost, params, _scaled(gradient, PLANTED[kind]),
                                     method=method)
        assert not report.passed, (kind, report.to_text())


@pytest.mark.parametrize("draw", range(4))
def test_a_sign_error_in_a_first_layer_weight_beside_float32_kinks_is_caught(draw):
    cost, gradient, params = _net(40 + draw, _random_dists(draw))
    exact = gradient(params)["W1"]
    # The entry of largest size: a sign error there is gross by any standard.
    i, j = np.unravel_index(np.argmax(np.abs(exact)), exact.shape)
    report = gk.compare_gradient(
        cost, params, _scaled(gradient, lambda g: g["W1"].__setitem__((i, j), -g["W1"][i, j])))
    assert not report.passed, report.to_text()
    row = [r for r in report.rows if r.name == f"W1[{i}, {j}]"][0]
    assert row.verdict == "disagree", report.to_text()


def test_one_ulp_jitter_of_a_float32_cost_is_not_quantization():
    # This net's cost is near 1: along the noise lines its values change by an ulp
    # (1.2e-7) or two, with repeats between.  Read as a grid, the cost was called
    # piecewise constant and a correct gradient disagreed.
    cost, gradient, params = _net(120, (-3.26e-05, -1.78e-05, -1.12e-05))
    report = gk.compare_gradient(cost, params, gradient)
    assert report.passed, report.to_text()
    assert not any("piecewise constant" in n for n in report.notes), report.notes


def test_a_float32_cost_rounded_to_a_grid_is_still_quantized():
    def cost(v):
        return np.float32(np.round(np.sum(v ** 2) * 100) / 100)
    x = np.array([0.3, -1.2, 0.7], dtype=F32)
    report = gk.compare_gradient(cost, x, lambda v: 0 * v)
    assert not report.passed, report.to_text()
    assert any("piecewise constant" in n for n in report.notes), report.notes


def test_ulp_steps_are_rounding_in_float32_and_grid_steps_in_float64():
    from gradcheck_kit.stencils import looks_quantized
    one_ulp = float(np.finfo(F32).eps)
    jitter = 1.0 + one_ulp * np.array([0, 0, 0, 1, 1, 1, 0, 0, 0])
    assert looks_quantized(jitter, one_ulp) is False
    assert looks_quantized(jitter) is True      # float64 values: 5e8 epsilons apart
    grid = 1.0 + 1e-3 * np.array([0, 0, 0, 1, 1, 1, 1, 2, 2])
    assert looks_quantized(grid, one_ulp) is True


def _net_with_kinks_at_the_point(seed, distances):
    """A float32 leaky-ReLU net with zero biases and a zero input row (every unit's input
    on that sample is exactly 0: kinks at the point for each bias), and four other
    pre-activations moved to `distances` from 0; its right-derivative backprop gradient."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(12, 4)).astype(np.float32)
    X[3] = 0
    y = rng.normal(size=12).astype(np.float32)
    W1 = rng.normal(size=(4, 6)).astype(np.float32)
    W2 = rng.normal(size=6).astype(np.float32)
    for (i, j), d in zip([(0, 0), (1, 2), (5, 4), (7, 1)], distances):
        k = int(np.argmax(np.abs(X[i])))
        W1[k, j] = np.float32(W1[k, j] - (X[i] @ W1[:, j] - d) / X[i, k])

    def cost(p):
        z = X @ p["W1"] + p["b1"]
        return 0.5 * np.mean((np.where(z > 0, z, 0.05 * z) @ p["W2"] - y) ** 2)

    def gradient(p):
        z = X @ p["W1"] + p["b1"]
        a = np.where(z > 0, z, 0.05 * z)
        r = (a @ p["W2"] - y) / len(y)
        g = np.outer(r, p["W2"]) * np.where(z >= 0, 1.0, 0.05)   # relu'(0) from the right
        return {"W1": X.T @ g, "b1": g.sum(0), "W2": a.T @ r}
    return cost, gradient, {"W1": W1, "b1": np.zeros(6, np.float32), "W2": W2}


@pytest.mark.xfail(strict=True, reason="known false alarm (DEVELOPERS.md, 'Choices written "
                   "down'): a kink at the point and another 5e-4 away on one side; the forward "
                   "side across it looks precise and b1[4]'s right derivative is called wrong")
def test_kink_at_the_point_next_to_another_within_the_step():
    # b1[4]: exact right derivative 0.3774 (analytic), left 0.2590 (float64 differences
    # of the same float32 cost); the forward side at step 4e-3 crosses a kink 5e-4 away.
    cost, gradient, params = _net_with_kinks_at_the_point(
        500, (-8.25017601e-04, 1.74006013e-05, -5.04578711e-04, 4.44824702e-03))
    report = gk.compare_gradient(cost, params, gradient, method="central")
    assert report.passed, str(report)
