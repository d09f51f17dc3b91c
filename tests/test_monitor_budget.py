"""The monitor's budget: with every=None a check runs only when everything the monitor has
spent (the first check included) plus its largest check stays within `budget` times the
run, in time and in evaluations (each observed step counting as one evaluation).

The monitor's clock is replaced by a counter the test advances (the run's steps and the
cost's calls take the time the test says), so the schedules below are exact and nothing
is timed.  Invented data.
"""
import numpy as np
import pytest

import gradcheck_kit as gk
import gradcheck_kit.monitor as monitor_module
from gradcheck_kit.monitor import budget_allows


class Clock:
    """perf_counter() of a clock that moves only when told."""

    def __init__(self):
        self.now = 0.0

    def perf_counter(self):
        return self.now


@pytest.fixture
def clock(monkeypatch):
    fake = Clock()
    monkeypatch.setattr(monitor_module, "time", fake)
    return fake


def run(clock, steps, step_seconds, call_seconds, **options):
    def cost(x):
        clock.now += call_seconds     # each of the monitor's cost calls takes this long
        return float(np.sum(x ** 4))

    monitor = gk.GradientMonitor(cost, seed=0, **options)
    x = np.array([1.0, -0.5, 0.25])
    for step in range(steps):
        g = 4 * x ** 3
        clock.now += step_seconds     # the run's own work between two observe() calls
        monitor.observe(x, g, step=step)
        x = x - 0.01 * g
    return monitor.report()


def test_checks_wait_until_the_run_has_paid_for_them_in_evaluations(clock):
    # the run's steps take far longer than the monitor's calls: the evaluation side binds
    report = run(clock, 1000, 1.0, 1e-6, budget=0.05)
    assert report.passed
    # 9 evaluations per check (5 + 4): the k-th check needs 9 (k + 1) <= 0.05 * steps seen
    assert [r.evaluations for r in report.rows] == [9] * 5
    assert report.checked_steps == [0, 359, 539, 719, 899]
    assert report.evaluations <= 0.05 * report.steps_seen


def test_the_time_side_binds_where_the_cost_is_slow_next_to_the_steps(clock):
    # a check takes 9 calls of 20 s, a step 10 s: 5% of the run's time pays for a check
    # every 360 steps, twice as rarely as the evaluations allow (every 180)
    report = run(clock, 1500, 10.0, 20.0, budget=0.05)
    assert report.checked_steps == [0, 720, 1080, 1440]   # the first is paid back first
    assert report.monitor_time <= 0.05 * report.run_time


def test_every_ignores_the_budget(clock):
    report = run(clock, 1000, 0.0, 1.0, every=100)
    assert report.checked_steps == list(range(0, 1000, 100))


def test_the_largest_check_seen_sets_the_wait():
    # 20 spent, the largest check 12: the next one fits from 640 steps on, not before
    assert not budget_allows(0.05, 100.0, 0.1, 0.01, 20, 12, 639)
    assert budget_allows(0.05, 100.0, 0.1, 0.01, 20, 12, 640)
    # the time side still binds where the run's time is short
    assert not budget_allows(0.05, 1.0, 0.045, 0.01, 20, 12, 10_000)
