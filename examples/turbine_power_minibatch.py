"""Wind-turbine power curve: is a mini-batch gradient right on average?

An invented scenario: a small wind farm fits a linear power curve for one turbine from its
ten-minute logs, power = slope * wind speed + ageing * years + offset, by least squares with
mini-batch gradient descent.  The optimizer never sees the full gradient, only mini-batch
draws, so the question is statistical: does the mean of the mini-batch gradient equal the
gradient of the full cost?

Two estimators are checked: the right one, and one with a planted bug of a common kind: it
divides the batch's sum by the number of log entries instead of the batch size, so it
points the right way with the wrong length (a factor B/N).

Run:  python examples/turbine_power_minibatch.py
"""
import numpy as np

import gradcheck_kit as gk

rng = np.random.default_rng(1893)
LOGS = 730                                       # ten-minute log entries kept for the fit
BATCH = 32
YEARS = np.linspace(0.0, 2.0, LOGS)              # turbine age at each entry
WIND = np.clip(rng.normal(8.0, 2.5, LOGS), 3.0, 14.0)               # metres per second
POWER = 0.21 * WIND - 0.03 * YEARS - 0.4 + 0.05 * rng.normal(size=LOGS)   # megawatts
FEATURES = np.column_stack([WIND, YEARS])

START = {"coef": np.array([0.15, 0.0]), "offset": 0.0}


def power_cost(params):
    """Half the mean squared difference between the curve and the logged power."""
    residual = FEATURES @ params["coef"] + params["offset"] - POWER
    return 0.5 * np.mean(residual ** 2)


def batch_gradient(params, rng):
    """One mini-batch draw of the gradient: BATCH log entries without replacement."""
    rows = rng.choice(LOGS, BATCH, replace=False)
    residual = FEATURES[rows] @ params["coef"] + params["offset"] - POWER[rows]
    return {"coef": FEATURES[rows].T @ residual / BATCH, "offset": float(residual.mean())}


def batch_gradient_planted_bug(params, rng):
    """The same draw normalised by the number of log entries: off by BATCH / LOGS."""
    rows = rng.choice(LOGS, BATCH, replace=False)
    residual = FEATURES[rows] @ params["coef"] + params["offset"] - POWER[rows]
    return {"coef": FEATURES[rows].T @ residual / LOGS, "offset": float(residual.sum() / LOGS)}


def main():
    right = gk.compare_stochastic_gradient(batch_gradient, START, cost=power_cost, seed=2024)
    print(right)
    print()
    wrong = gk.compare_stochastic_gradient(batch_gradient_planted_bug, START, cost=power_cost,
                                           seed=2024)
    print(wrong)
    print()
    print(f"as documented: the right estimator {'passes' if right.passed else 'FAILS'}, the "
          f"planted bug is {'found' if not wrong.passed else 'MISSED'}")
    return 0 if right.passed and not wrong.passed else 1


if __name__ == "__main__":
    raise SystemExit(main())
