"""Greenhouse heat loss: a least-squares fit with a hand-written gradient (correct).

An invented scenario: a grower logs hourly heating power against the
inside-outside temperature difference and wind speed, and fits
    power = u_area * dT * (1 + wind_factor * wind) + base_load
by least squares.  The gradient below is right; the check passes (exit 0).

Check it: gradcheck-kit check examples/greenhouse_heat_loss.py
"""
import numpy as np

import gradcheck_kit as gk

rng = np.random.default_rng(7)
DELTA_T = rng.uniform(2.0, 18.0, 96)          # kelvin
WIND = rng.gamma(2.0, 1.5, 96)                # metres per second
POWER = 0.9 * DELTA_T * (1 + 0.08 * WIND) + 1.5 + rng.normal(0, 0.3, 96)   # kilowatts


def heat_loss_cost(p):
    model = p["u_area"] * DELTA_T * (1 + p["wind_factor"] * WIND) + p["base_load"]
    return 0.5 * np.mean((model - POWER) ** 2)


def heat_loss_gradient(p):
    model = p["u_area"] * DELTA_T * (1 + p["wind_factor"] * WIND) + p["base_load"]
    r = (model - POWER) / len(POWER)
    return {"u_area": float(np.sum(r * DELTA_T * (1 + p["wind_factor"] * WIND))),
            "wind_factor": float(np.sum(r * p["u_area"] * DELTA_T * WIND)),
            "base_load": float(np.sum(r))}


gk.case(gradient=heat_loss_gradient,
        params={"u_area": 0.7, "wind_factor": 0.05, "base_load": 1.0})(heat_loss_cost)

if __name__ == "__main__":
    print(gk.compare_gradient(heat_loss_cost, {"u_area": 0.7, "wind_factor": 0.05,
                                               "base_load": 1.0}, heat_loss_gradient))
