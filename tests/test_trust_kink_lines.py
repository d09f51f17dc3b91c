"""Kinks near the point must not be read as noise.

A leaky-ReLU network whose pre-activations lie within 1e-7..1e-5 of 0 is exact (no
noise), but the noise lines through all coordinates cross those kinks.  A line across a
kink has a difference table that settles (More & Wild's test passes) at a level that
scales with the spacing; read as noise, the cost was called noisy, every step grew about
100-fold and crossed the kinks, and a correct gradient disagreed (relative error 0.3) with
every method on two of these six seeds.  The gradient formulas are the standard
backpropagation ones (common practice); the 5% error planted in the output weights must
still be caught.
"""
import numpy as np
import pytest

import gradcheck_kit as gk

ALPHA = 0.05


def _net(seed):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(12, 4))
    y = rng.normal(size=12)
    W1 = rng.normal(size=(4, 6))
    b1 = rng.normal(size=6) * 0.1
    W2 = rng.normal(size=6)
    Z = X @ W1 + b1
    # Three pre-activations moved next to their kink: 3e-7, -2e-6 and 5e-8 from 0.
    b1[0] -= Z[0, 0] - 3e-7
    b1[2] -= Z[1, 2] + 2e-6
    b1[4] -= Z[5, 4] - 5e-8

    def cost(p):
        z = X @ p["W1"] + p["b1"]
        a = np.where(z > 0, z, ALPHA * z)
        return 0.5 * np.mean((a @ p["W2"] - y) ** 2)

    def gradient(p):
        z = X @ p["W1"] + p["b1"]
        a = np.where(z > 0, z, ALPHA * z)
        r = (a @ p["W2"] - y) / len(y)
        ga = np.outer(r, p["W2"]) * np.where(z > 0, 1.0, ALPHA)
        return {"W1": X.T @ ga, "b1": ga.sum(0), "W2": a.T @ r}

    return cost, gradient, {"W1": W1, "b1": b1, "W2": W2}


@pytest.mark.parametrize("seed", [0, 5])
@pytest.mark.parametrize("method", ["central", "richardson", "auto"])
def test_leaky_relu_net_beside_its_kinks_passes(seed, method):
    cost, gradient, params = _net(seed)
    report = gk.compare_gradient(cost, params, gradient, method=method)
    assert report.passed, report.to_text()
    assert not any("noisy" in note for note in report.notes), report.notes


@pytest.mark.parametrize("method", ["central", "richardson", "auto"])
def test_leaky_relu_net_beside_its_kinks_output_weight_error_is_caught(method):
    cost, gradient, params = _net(0)

    def wrong(p):
        g = gradient(p)
        g["W2"] = 1.05 * g["W2"]
        return g

    report = gk.compare_gradient(cost, params, wrong, method=method)
    assert not report.passed
    assert {row.parameter for row in report.mismatches} == {"W2"}


@pytest.mark.parametrize("seed", [1, 2, 3, 29, 33, 37])
def test_periodic_noise_is_still_measured_as_noise(seed):
    # Deterministic noise of 1e-8 on a value of about 10.  Re-measuring every plausible
    # level at shorter spacings lost it at these seeds (a shorter line sampled the
    # period in step and saw a smooth curve): only lines straight between a few bends are
    # re-measured, and noise bends every second difference.
    rng = np.random.default_rng(seed)
    r = rng.normal(size=5)

    def cost(x):
        return 10.0 + np.sum(x ** 2) + 1e-8 * np.sin(1e8 * (x @ r))

    x = rng.normal(size=5)
    assert gk.estimate_noise(cost, x).level > 1e-9
