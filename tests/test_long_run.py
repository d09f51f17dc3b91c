"""A plan before a long run: a check whose sweep would take long says so before it starts,
with the quicker ways, as a LongCheckWarning and a note of the report."""
import time
import warnings

import numpy as np
import pytest

import gradcheck_kit as gk
from gradcheck_kit import notes, pipeline
from gradcheck_kit.errors import LongCheckWarning


def slow_cost(x):
    time.sleep(0.002)
    return float(np.sum(x ** 2))


def grad(x):
    return 2 * x


def long_warnings(record):
    return [str(w.message) for w in record if issubclass(w.category, LongCheckWarning)]


def test_a_long_sweep_is_announced_with_the_quicker_ways(monkeypatch):
    monkeypatch.setattr(pipeline, "LONG_CHECK_SECONDS", 0.05)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        report = gk.compare_gradient(slow_cost, np.ones(60), grad, method="central")
    found = long_warnings(record)
    assert len(found) == 1
    text = found[0]
    assert "120 evaluations" in text                    # 2 per coordinate, 60 coordinates
    assert "coordinates=k" in text and "locate_mismatches" in text
    assert text in report.notes
    assert record[0].filename == __file__              # points at the caller's line


def test_a_sampled_check_is_not_told_to_sample(monkeypatch):
    monkeypatch.setattr(pipeline, "LONG_CHECK_SECONDS", 0.01)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        gk.compare_gradient(slow_cost, np.ones(60), grad, method="central", coordinates=10,
                            seed=0)
    (text,) = long_warnings(record)
    assert "coordinates=k" not in text and "locate_mismatches" in text


def test_a_short_check_says_nothing():
    with warnings.catch_warnings():
        warnings.simplefilter("error", LongCheckWarning)
        report = gk.compare_gradient(lambda x: np.sum(x ** 2), np.ones(5), grad)
    assert report.passed and not any("will take about" in n for n in report.notes)


@pytest.mark.parametrize("seconds, words", [(0.0004, "ms"), (3.0, " s"), (600, "minutes"),
                                            (9000, "hours")])
def test_durations_read_in_plain_units(seconds, words):
    assert words in notes.duration(seconds)
