"""A custom autograd primitive with its own vector-Jacobian product.

An invented scenario: a pricing model squashes raw demand scores with a
smooth clip, softclip(x) = log(1 + e^x) - log(1 + e^(x - c)), implemented as
an autograd primitive with a hand-derived VJP for speed and stability.
gradient=None makes autograd differentiate the cost *through that VJP*, so
the check tests the custom rule against numeric derivatives (exit 0 here;
edit the VJP to see it fail).

Check it: gradcheck-kit check examples/soft_clip_primitive.py
"""
import autograd.numpy as anp
import numpy as np
from autograd.extend import defvjp, primitive

import gradcheck_kit as gk

CEILING = 3.0


@primitive
def softclip(x):
    return np.logaddexp(0.0, x) - np.logaddexp(0.0, x - CEILING)


def softclip_vjp(ans, x):
    slope = 1 / (1 + np.exp(-x)) - 1 / (1 + np.exp(CEILING - x))   # logistic(x) - logistic(x - c)
    return lambda g: g * slope


defvjp(softclip, softclip_vjp)

SCORES = np.linspace(-2.0, 5.0, 8)


@gk.case(params={"gain": np.array([0.8, 1.3]), "offset": 0.2})
def pricing_cost(p):
    squashed = softclip(p["gain"][0] * SCORES + p["offset"]) * p["gain"][1]
    return anp.sum((squashed - 1.5) ** 2)


if __name__ == "__main__":
    print(gk.compare_gradient(pricing_cost, {"gain": np.array([0.8, 1.3]), "offset": 0.2}))
