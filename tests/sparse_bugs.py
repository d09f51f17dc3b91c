"""A large separable cost with a few wrong gradient coordinates, for group testing
(shared by test_scale.py and benchmarks.py)."""
import numpy as np


def planted(n, bad, seed=0, factor=1.05):
    """(cost, wrong gradient, point): sum w_i (x_i^2 + sin x_i), entries `bad` off by `factor`."""
    rng = np.random.default_rng(seed)
    w = rng.uniform(0.5, 2.0, n)

    def cost(x):
        return np.sum(w * (x ** 2 + np.sin(x)))

    def gradient(x):
        g = w * (2 * x + np.cos(x))
        g[list(bad)] *= factor
        return g
    return cost, gradient, rng.normal(size=n)
