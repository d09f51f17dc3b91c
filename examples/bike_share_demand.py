"""Bike-share demand: Poisson regression of hourly rentals with a hand-written gradient.

An invented scenario: a city bike scheme models rentals per hour at a dock from
temperature, rain, hour-of-day and a weekend flag.  The cost is the mean Poisson
negative log-likelihood; the hand-written gradient below has a planted bug of a
kind that is common in practice: its bias entry sums over the hours where the
cost takes a mean, so it is off by the number of hours.

Check it: gradcheck-kit check examples/bike_share_demand.py
The case below declares its planted bug (expect_mismatch=True), so the command
prints the report of the bug and exits 0 when the bug is found; under pytest the
case is an expected failure.  Check the cost on its own to see the plain verdict:
          gradcheck-kit check examples/bike_share_demand.py:demand_cost \
              --gradient examples/bike_share_demand.py:demand_gradient --params start.npz
Or:       python examples/bike_share_demand.py
"""
import numpy as np

import gradcheck_kit as gk

rng = np.random.default_rng(2024)
HOURS = 24 * 7
FEATURES = np.column_stack([
    rng.normal(18, 6, HOURS) / 10,        # temperature, tens of degrees
    rng.random(HOURS) < 0.2,              # raining
    np.sin(np.arange(HOURS) * 2 * np.pi / 24),
    (np.arange(HOURS) // 24) % 7 >= 5,    # weekend
]).astype(float)
RENTALS = rng.poisson(np.exp(FEATURES @ np.array([0.6, -0.9, 0.4, 0.3]) + 1.2)).astype(float)


def demand_cost(params):
    """Mean Poisson negative log-likelihood (constant terms dropped)."""
    eta = FEATURES @ params["weights"] + params["bias"]
    return np.mean(np.exp(eta) - RENTALS * eta)


def demand_gradient(params):
    eta = FEATURES @ params["weights"] + params["bias"]
    residual = np.exp(eta) - RENTALS
    return {
        "weights": FEATURES.T @ residual / HOURS,
        "bias": float(np.sum(residual)),   # BUG: the cost averages, this sums (mean vs sum)
    }


START = {"weights": np.array([0.5, -0.5, 0.2, 0.1]), "bias": 1.0}

# Declared for `gradcheck-kit check` and for the pytest plugin.
gk.case(gradient=demand_gradient, params=START, expect_mismatch=True)(demand_cost)

if __name__ == "__main__":
    report = gk.compare_gradient(demand_cost, START, demand_gradient)
    print(report)
