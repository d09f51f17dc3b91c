"""A JAX custom_vjp for a numerically stable function, checked through jax.grad.

An invented scenario: a harbour's flood warning takes a soft maximum of the water
levels reported by its tide gauges, softmax_t(v) = t * log(sum(exp(v / t))), computed
stably by shifting by the largest level, with a custom_vjp whose backward is the
softmax of v / t (and, for the temperature t, softmax_t(v) / t - sum(w v) / t).
gradient=None makes jax.grad differentiate the cost *through that rule*, so the
check tests it against numeric derivatives (exit 0 here; edit the backward to see
it fail).

Check it: gradcheck-kit check examples/tide_gauge_jax.py
Needs JAX (pip install jax: a CPU build); without it, running this file says so and exits.
"""
import sys

try:
    import jax
    import jax.numpy as jnp
except ImportError:
    if __name__ == "__main__":
        print("skipped: this example needs JAX (pip install jax, which installs a CPU build)")
        sys.exit(0)
    raise

import gradcheck_kit as gk


@jax.custom_vjp
def soft_maximum(levels, t):
    top = jnp.max(levels)
    return top + t * jnp.log(jnp.sum(jnp.exp((levels - top) / t)))


def soft_maximum_forward(levels, t):
    value = soft_maximum(levels, t)
    return value, (levels, t, value)


def soft_maximum_backward(saved, g):
    levels, t, value = saved
    w = jnp.exp((levels - value) / t)                 # softmax(levels / t), stably
    return g * w, g * (value - jnp.sum(w * levels)) / t


soft_maximum.defvjp(soft_maximum_forward, soft_maximum_backward)

# gauge readings in metres above chart datum; at a temperature of 0.02 the naive
# exp(v / t) would overflow float32 (e^200), the shifted form never does
READINGS = jnp.array([[3.42, 3.91, 3.18], [3.77, 3.35, 4.06], [2.95, 3.12, 3.64]])
WARNING_LEVEL = 3.9
START = {"gain": jnp.array([1.0, 0.97, 1.03]), "temperature": jnp.array(0.3)}


@gk.case(params=START)
def warning_cost(p):
    peaks = jnp.stack([soft_maximum(row * p["gain"], p["temperature"]) for row in READINGS])
    return jnp.mean((peaks - WARNING_LEVEL) ** 2)


if __name__ == "__main__":
    print(gk.compare_gradient(warning_cost, START))
