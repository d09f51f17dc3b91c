"""Benchmark of the gradient monitor (run by hand: python tests/monitor_benchmark.py [--quick]).

Prints, measured in one run, side by side:
1. overhead: the monitor's extra cost evaluations as a fraction of the run's own (cost and
   gradient calls, each counted as one, and with a gradient counted as the cost evaluations
   it takes), and the time of the monitored run against the same run unmonitored (best of
   three each), on a ReLU regression trained by full-batch gradient descent; the budget
   (5%) holds in both time and evaluations once the run has paid for the first check
   (every=None: each observed step counts as one evaluation of the run);
2. detection: the step at which a planted region-dependent bug is first reported, next to
   the step at which the bug's region is first entered (a safe-log branch below 1e-3; a
   gradient that treats dead ReLU units as leaky);
3. false alarms: failing checks with correct gradients over many seeds (should be 0).

Invented data; the losses and gradients are the textbook forms (common practice).
"""
from __future__ import annotations

import sys
import time

import warnings

import numpy as np

import gradcheck_kit as gk

QUICK = "--quick" in sys.argv


# --- a ReLU regression, full batch ------------------------------------------------------
def relu_problem(seed, n=3000, d=12, hidden=24):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, d))
    y = np.maximum(X @ rng.normal(size=d), 0) - 0.5 * X[:, 0] + 0.1 * rng.normal(size=n)
    params = {"W": rng.normal(size=(d, hidden)) / np.sqrt(d), "b": rng.normal(size=hidden) * 0.5,
              "v": rng.normal(size=hidden) / np.sqrt(hidden)}

    def cost(p):
        H = np.maximum(X @ p["W"] + p["b"], 0.0)
        r = H @ p["v"] - y
        return 0.5 * np.mean(r * r)

    def gradient(p, leaky_dead=False):
        Z = X @ p["W"] + p["b"]
        H = np.maximum(Z, 0.0)
        r = (H @ p["v"] - y) / n
        mask = (Z > 0).astype(float)
        if leaky_dead:      # the planted bug: dead units get a leaky slope the cost lacks
            dead = ~mask.any(axis=0)
            mask[:, dead] = 0.01
        back = np.outer(r, p["v"]) * mask
        return {"W": X.T @ back, "b": back.sum(axis=0), "v": H.T @ r}
    return cost, gradient, params


def train(cost, gradient, params, steps, rate, monitor=None, counter=None):
    p = {k: v.copy() for k, v in params.items()}
    for step in range(steps):
        g = gradient(p)
        if counter is not None:
            counter["calls"] += 1
        if monitor is not None:
            monitor.observe(p, g, step=step)
        p = {k: p[k] - rate * g[k] for k in p}
        if step % 10 == 0:           # a progress log, as real loops have: one cost call
            cost(p)
            if counter is not None:
                counter["calls"] += 1
    return p


def overhead(steps):
    cost, gradient, params = relu_problem(0)
    times = {"plain": [], "monitored": []}
    calls, evaluations, share = 0, 0, 0.0
    for _ in range(3):
        start = time.perf_counter()
        train(cost, gradient, params, steps, 0.05)
        times["plain"].append(time.perf_counter() - start)
        monitor = gk.GradientMonitor(cost, budget=0.05, seed=0)
        counter = {"calls": 0}
        start = time.perf_counter()
        train(cost, gradient, params, steps, 0.05, monitor, counter)
        times["monitored"].append(time.perf_counter() - start)
        report = monitor.report()
        calls, evaluations, share = counter["calls"], report.evaluations, report.overhead
        checks = len(report.rows)
        largest = max(r.evaluations for r in report.rows)
        first_paid = int(np.ceil(report.rows[0].evaluations / 0.05))
    plain, monitored = min(times["plain"]), min(times["monitored"])
    units = _gradient_in_cost_units(cost, gradient, params)
    run_units = steps * units + (calls - steps)
    print("1. overhead (ReLU regression, 3000 rows, 12 -> 24 -> 1, full-batch descent, "
          f"{steps} steps, budget 5%)")
    print(f"   monitor: {checks} checks, {evaluations} cost evaluations; the run: {calls} cost "
          f"and gradient calls -> {evaluations / calls:.1%} extra calls; counting a gradient "
          f"as the {units:.2f} cost evaluations it takes (timed): {evaluations / run_units:.1%}")
    print(f"   schedule: {checks} checks of at most {largest} evaluations in {steps} steps; the "
          f"first check alone is paid back after {first_paid} steps")
    print(f"   time: monitored {monitored:.3f} s, unmonitored {plain:.3f} s -> ratio "
          f"{monitored / plain:.3f} (the monitor's own measure: {share:.1%} of the run's time)")
    return monitored / plain


def _gradient_in_cost_units(cost, gradient, params, repeats=30):
    """The time of one gradient call over that of one cost call (best of `repeats`)."""
    def best(f):
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            f(params)
            times.append(time.perf_counter() - start)
        return min(times)
    return best(gradient) / best(cost)


def relu_detection(seed, steps, rate=0.6, every=None):
    cost, gradient, params = relu_problem(seed)
    monitor = gk.GradientMonitor(cost, budget=0.05, every=every, seed=seed)
    p = {k: v.copy() for k, v in params.items()}
    first_dead = None
    for step in range(steps):
        g = gradient(p, leaky_dead=True)
        if first_dead is None and _any_dead(p, seed):
            first_dead = step
        monitor.observe(p, g, step=step)
        p = {k: p[k] - rate * g[k] for k in p}
    return first_dead, monitor.report()


_DATA = {}


def _any_dead(p, seed):
    if seed not in _DATA:
        rng = np.random.default_rng(seed)
        _DATA[seed] = rng.normal(size=(3000, 12))
    Z = _DATA[seed] @ p["W"] + p["b"]
    return bool((~(Z > 0).any(axis=0)).any())


# --- the safe-log fit of tests/test_monitor.py --------------------------------------------
FLOOR = 1e-3


def safe_log_problem(seed):
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(40, 6))
    target = np.abs(rng.normal(size=6)) + 0.2
    target[0] = -0.3
    b = A @ target

    def cost(x):
        r = A @ x - b
        inside = np.where(x >= FLOOR, np.log(np.maximum(x, FLOOR)),
                          np.log(FLOOR) + (x - FLOOR) / FLOOR)
        return 0.5 * r @ r / len(b) - 1e-3 * np.sum(inside)

    def gradient(x, bug=False):
        slope = 1 / x if bug else np.where(x >= FLOOR, 1 / np.maximum(x, FLOOR), 1 / FLOOR)
        return A.T @ (A @ x - b) / len(b) - 1e-3 * slope
    return cost, gradient


def safe_log_detection(seed, steps=400, every=None, bug=True):
    cost, gradient = safe_log_problem(seed)
    monitor = gk.GradientMonitor(cost, every=every, seed=seed)
    x = np.full(6, 0.5)
    inside = []       # the steps at which x is in the bug's region (x hovers near FLOOR)
    for step in range(steps):
        if x.min() < FLOOR:
            inside.append(step)
        g = gradient(x, bug)
        monitor.observe(x, g, step=step)
        x = x - 0.05 * g
    return inside, monitor.report()


def main():
    steps = 300 if QUICK else 1500
    ratio = overhead(steps)

    print("2. detection of region-dependent bugs")
    inside, report = safe_log_detection(0, every=10)
    first_inside = min(s for s in report.checked_steps if s in inside)
    print(f"   safe-log branch (every=10): region first entered at step {inside[0]}, first "
          f"checked step inside it {first_inside}; first reported at step "
          f"{report.first_wrong_step} (last right: {report.last_right_step}); "
          f"coordinates named: {[r.name for r in report.coordinate_report.mismatches]}")
    inside, report = safe_log_detection(0)
    print(f"   the same with the 5% budget: first reported at step {report.first_wrong_step} "
          f"({len(report.rows)} checks in 400 steps: a step of this fit takes microseconds, "
          "so 5% of the run's time buys few checks)")
    dead, report = relu_detection(1, 200 if QUICK else 400, every=5)
    print(f"   dead ReLU units treated as leaky (every=5): first unit dead at step {dead}, "
          f"first reported at step {report.first_wrong_step}")
    dead, report = relu_detection(1, 200 if QUICK else 400)
    print(f"   the same with the 5% budget: first reported at step {report.first_wrong_step} "
          f"({len(report.rows)} checks)")

    print("3. false alarms with correct gradients")
    seeds = range(5 if QUICK else 25)
    failing = checks = 0
    for seed in seeds:
        _, report = safe_log_detection(seed, steps=300, every=3, bug=False)
        failing += sum(r.failing for r in report.rows)
        checks += len(report.rows)
    print(f"   safe-log fit, {len(seeds)} seeds: {failing} failing of {checks} checks")
    failing = checks = 0
    for seed in seeds:
        cost, gradient, params = relu_problem(100 + seed)
        monitor = gk.GradientMonitor(cost, every=4, seed=seed)
        train(cost, gradient, params, 120, 0.1, monitor)
        report = monitor.report()
        failing += sum(r.failing for r in report.rows)
        checks += len(report.rows)
    print(f"   ReLU regression (kinks everywhere), {len(seeds)} seeds: {failing} failing of "
          f"{checks} checks")
    return ratio


if __name__ == "__main__":
    warnings.simplefilter("ignore", RuntimeWarning)   # the planted-bug runs overflow late
    main()
