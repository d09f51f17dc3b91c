"""float32 model fits shared by the trust and report tests."""
import numpy as np


# A float32 fit of a draining tank's level, h(t) = h0 - a t^2 + b t, with h0 near 900 and
# a, b of size 1; least squares, derivatives textbook (common practice).
def tank_fit(h0):
    t = np.linspace(0.5, 20.0, 40).astype(np.float32)
    level = (910.0 - 1.05 * t ** 2 + 0.4 * t +
             np.random.default_rng(11).normal(0, 2, t.size)).astype(np.float32)
    params = {"h0": np.float32(h0), "a": np.float32(1.0), "b": np.float32(0.5)}

    def cost(p):
        r = p["h0"] - p["a"] * t ** 2 + p["b"] * t - level
        return np.mean(r * r)

    def gradient(p):
        r = p["h0"] - p["a"] * t ** 2 + p["b"] * t - level
        return {"h0": 2 * np.mean(r), "a": -2 * np.mean(r * t ** 2), "b": 2 * np.mean(r * t)}
    return cost, gradient, params
