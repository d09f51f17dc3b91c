"""Cold store compressor: a gradient that goes wrong only once a clipping branch switches on.

An invented scenario: a cold store logs daily compressor power against the outside
temperature, door openings and stock volume, and fits
    power = min(w . features + base, CAPACITY)
(the compressor cannot draw more than its capacity) by plain gradient descent.  The
hand-written gradient forgets that a clipped day has no slope.  At the start no day is
clipped, so the declared check passes there (exit 0: the bug is out of reach), which is
exactly why a check at one point is not enough.  Run as a script, a GradientMonitor rides
along with the descent and reports the first checked step after the clipping switches on,
with a per-coordinate check there.

Check it:   gradcheck-kit check examples/cold_store_compressor.py
Watch it:   python examples/cold_store_compressor.py
"""
import numpy as np

import gradcheck_kit as gk

CAPACITY = 30.0                                             # kilowatts
rng = np.random.default_rng(11)
FEATURES = np.column_stack([rng.uniform(-5, 32, 120),       # outside temperature, Celsius
                            rng.poisson(40, 120) / 10,      # door openings, tens per day
                            rng.uniform(0.3, 1.0, 120)])    # stock volume, fraction full
POWER = np.minimum(FEATURES @ [0.7, 1.5, 6.0] + 4.0, CAPACITY) + rng.normal(0, 0.4, 120)
START = {"w": np.array([0.1, 0.3, 0.5]), "base": 1.0}


def compressor_cost(p):
    model = np.minimum(FEATURES @ p["w"] + p["base"], CAPACITY)
    return 0.5 * np.mean((model - POWER) ** 2)


def compressor_gradient(p):
    model = np.minimum(FEATURES @ p["w"] + p["base"], CAPACITY)
    r = (model - POWER) / len(POWER)         # the bug: clipped days should get no slope
    return {"w": FEATURES.T @ r, "base": float(np.sum(r))}


gk.case(gradient=compressor_gradient, params=START)(compressor_cost)


def descend(steps=400, rate=0.0002):
    """Plain gradient descent with the monitor; returns (its report, first clipped step)."""
    monitor = gk.GradientMonitor(compressor_cost, every=10, seed=0)
    p = {"w": START["w"].copy(), "base": START["base"]}
    clipped_from = None
    for step in range(steps):
        if clipped_from is None and np.any(FEATURES @ p["w"] + p["base"] >= CAPACITY):
            clipped_from = step
        g = compressor_gradient(p)
        monitor.observe(p, g, step=step)
        p = {"w": p["w"] - rate * g["w"], "base": p["base"] - rate * g["base"]}
    return monitor.report(), clipped_from


if __name__ == "__main__":
    print(gk.compare_gradient(compressor_cost, START, compressor_gradient))
    report, clipped_from = descend()
    print(f"\nthe first day is clipped at step {clipped_from}; the monitor says:")
    print(report)
