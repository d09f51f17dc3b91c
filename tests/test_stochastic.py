"""compare_stochastic_gradient: verdicts, hints, report text and JSON, reproducible draws,
executors, and bad input (one clear message or error rows, never a traceback).

The estimators and their exact means come from stochastic_benchmark.py (invented data;
closed forms derived there).  Seeds are fixed, so no test can flake."""
import json
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

import gradcheck_kit as gk
import stochastic_benchmark as sb


def test_a_right_mini_batch_gradient_passes_with_every_coordinate_agreeing():
    report = sb.check(sb.UNBIASED[0], seed=3, level=1e-3)
    assert report.passed
    assert {r.verdict for r in report.rows} == {"agree"}
    for r in report.rows:
        assert r.low <= r.bias <= r.high
        assert abs(r.relative_bias) + (r.high - r.low) / 2 / r.scale <= report.resolution
    assert report.draws == report.rounds[-1] and report.draws <= 4096


def test_dividing_by_the_data_size_is_found_and_named_batch_versus_data_size():
    report = sb.check(sb.PLANTED[0], seed=3, level=1e-3)
    assert not report.passed
    assert {r.verdict for r in report.rows} == {"disagree"}
    hint = " ".join(report.hints)
    assert "factor" in hint and "batch size versus data size" in hint
    # the factor printed is B/N within its statistical error (B/N = 16/203 = 0.0788)
    factor = float(hint.split("draws are ")[1].split(" ")[0])
    assert abs(factor - sb.B / sb.N) < 0.02


def test_a_flipped_sign_on_average_gets_the_sign_hint():
    report = sb.check(sb.PLANTED[6], seed=5, level=1e-3)
    assert not report.passed
    assert any(h.startswith("sign:") for h in report.hints)


def test_a_bias_in_one_parameter_only_is_named():
    report = sb.check(sb.PLANTED[8], seed=2, level=1e-3)
    assert not report.passed
    bad = {r.parameter for r in report.rows if r.verdict == "disagree"}
    assert bad == {"log_sigma"}
    assert any("single parameter" in h and "'log_sigma'" in h for h in report.hints)


def test_a_numeric_reference_from_the_cost_enters_with_its_error():
    report = sb.check(sb.UNBIASED[0], seed=3, level=1e-3, reference="cost")
    assert report.passed and report.reference == "cost" and report.evaluations > 0
    assert all(r.reference_error > 0 for r in report.rows)
    assert any(n.startswith("reference: numeric derivatives of cost") for n in report.notes)
    exact = sb.ls_gradient(sb.W0)
    assert np.allclose([r.reference for r in report.rows], exact, rtol=1e-8)


def test_the_same_seed_replays_the_check_draw_for_draw():
    one = sb.check(sb.UNBIASED[4], seed=11, level=1e-2, max_draws=256)
    two = sb.check(sb.UNBIASED[4], seed=11, level=1e-2, max_draws=256)
    other = sb.check(sb.UNBIASED[4], seed=12, level=1e-2, max_draws=256)
    assert [r.mean for r in one.rows] == [r.mean for r in two.rows]
    assert [r.mean for r in one.rows] != [r.mean for r in other.rows]


def test_a_fresh_seed_is_stated_and_replays():
    est = sb.UNBIASED[0]
    first = gk.compare_stochastic_gradient(est.sample, est.params, gradient=est.gradient,
                                           max_draws=64)
    note = next(n for n in first.notes if n.startswith("seed: drawn fresh"))
    assert f"seed={first.seed}" in note
    again = sb.check(est, seed=first.seed, level=1e-3, max_draws=64)
    assert [r.mean for r in again.rows] == [r.mean for r in first.rows]


def test_draws_on_an_executor_are_the_draws_of_a_serial_run():
    est = sb.UNBIASED[3]
    serial = sb.check(est, seed=4, level=1e-3, max_draws=128)
    with ThreadPoolExecutor(max_workers=2) as pool:
        pooled = sb.check(est, seed=4, level=1e-3, max_draws=128, executor=pool)
    assert [r.mean for r in pooled.rows] == [r.mean for r in serial.rows]


def test_report_text_json_and_figure(tmp_path):
    report = sb.check(sb.PLANTED[0], seed=3, level=1e-3)
    text = str(report)
    assert text.startswith("FAIL stochastic gradient check: 4 of 4 coordinates fail")
    assert "interval of the bias" in text and "detectable" in text
    assert "would have been found with 95% power" in text
    data = json.loads(report.to_json(tmp_path / "r.json"))
    assert data["schema"] == "gradcheck_kit/stochastic-gradient-report"
    assert data["passed"] is False and data["counts"] == {"disagree": 4}
    assert json.loads((tmp_path / "r.json").read_text()) == data
    assert {"reference", "mean", "bias", "standard_error", "low", "high", "relative_bias",
            "detectable", "verdict"} <= set(data["rows"][0])
    pytest.importorskip("matplotlib")
    path = report.plot(tmp_path / "bias.png")
    assert (tmp_path / "bias.png").stat().st_size > 1000 and path == tmp_path / "bias.png"


def test_too_few_draws_for_the_variance_leaves_rows_noisy_with_a_count_of_draws():
    est = sb.UNBIASED[5]                  # score function without baseline: large variance
    report = sb.check(est, seed=1, level=1e-3, max_draws=64)
    assert {r.verdict for r in report.rows} == {"noisy"}
    assert not report.passed and "no coordinate could be decided" in report.problems[0]
    for r in report.rows:
        assert r.draws_needed > 64 and f"about {r.draws_needed} draws" in r.detail


# --- bad input ------------------------------------------------------------------------------
def _good(w, rng):
    return w + rng.normal(size=w.shape)


W = np.array([1.0, -2.0])


@pytest.mark.parametrize("options, words", [
    ({}, "exactly one reference"),
    ({"gradient": W, "cost": lambda w: 0.5 * w @ w}, "got both"),
    ({"gradient": W, "level": 0.0}, "level: expected"),
    ({"gradient": W, "level": 0.7}, "level: expected"),
    ({"gradient": W, "max_draws": 8}, "max_draws: expected an integer >= 16"),
    ({"gradient": W, "seed": -1}, "seed: expected None or a non-negative integer"),
    ({"gradient": W, "resolution": 0}, "resolution: expected a positive number"),
    ({"gradient": W, "progress": "yes"}, "progress: expected"),
    ({"gradient": np.ones(3)}, "gradient for parameter 'x': expected shape (2,), got (3,)"),
    ({"cost": 3.0}, "cost: expected a callable"),
])
def test_bad_options_get_one_message(options, words):
    with pytest.raises(gk.CheckInputError) as info:
        gk.compare_stochastic_gradient(_good, W, **options)
    assert words in str(info.value)


def test_a_draw_of_the_wrong_shape_is_named():
    with pytest.raises(gk.CheckInputError, match=r"sample_gradient's draw for parameter 'x': "
                                                 r"expected shape \(2,\), got \(3,\)"):
        gk.compare_stochastic_gradient(lambda w, rng: np.ones(3), W, gradient=W)


def test_a_draw_of_the_wrong_structure_is_named():
    params = {"a": np.ones(2), "b": 1.0}
    with pytest.raises(gk.CheckInputError, match="different structure from params"):
        gk.compare_stochastic_gradient(lambda p, rng: {"a": np.ones(2)}, params,
                                       gradient={"a": np.ones(2), "b": 0.0})


def test_a_sample_gradient_that_always_raises_says_so():
    def broken(w, rng):
        raise ZeroDivisionError("empty batch")
    with pytest.raises(gk.CheckInputError, match="raised at all 64 draws.*empty batch"):
        gk.compare_stochastic_gradient(broken, W, gradient=W, seed=0)


def test_draws_that_raise_sometimes_fail_the_report_and_the_rest_goes_on():
    def flaky(w, rng):
        if rng.random() < 0.1:
            raise RuntimeError("batch sampler ran dry")
        return w + 0.1 * rng.normal(size=2)
    report = gk.compare_stochastic_gradient(flaky, W, gradient=W, seed=0)
    assert not report.passed and report.failed_draws > 0 and report.draws > 0
    assert "draws raised" in report.problems[0] and "batch sampler ran dry" in report.problems[0]
    assert {r.verdict for r in report.rows} == {"agree"}


def test_identical_draws_are_called_deterministic_with_the_ordinary_check_offered():
    report = gk.compare_stochastic_gradient(lambda w, rng: w * 1.0, W, gradient=W, seed=0)
    assert report.passed and report.draws == 64
    assert any("deterministic" in n and "compare_gradient" in n for n in report.notes)
    wrong = gk.compare_stochastic_gradient(lambda w, rng: w * 1.001, W, gradient=W, seed=0)
    assert {r.verdict for r in wrong.rows} == {"disagree"}


def test_non_finite_draws_give_non_finite_rows_and_the_rest_is_decided():
    def half_bad(w, rng):
        g = w + 0.1 * rng.normal(size=2)
        if rng.random() < 0.05:
            g[1] = np.nan
        return g
    report = gk.compare_stochastic_gradient(half_bad, W, gradient=W, seed=0)
    verdicts = {r.name: r.verdict for r in report.rows}
    assert verdicts == {"x[0]": "agree", "x[1]": "non-finite"} and not report.passed
    assert "non-finite here (the first: draw" in report.rows[1].detail


def test_the_users_arrays_are_never_changed():
    params = {"w": np.array([1.0, 2.0]), "b": np.array([0.5])}
    kept = {k: v.copy() for k, v in params.items()}

    def meddling(p, rng):
        p["w"] += 1.0                       # an estimator that edits its input
        return {"w": p["w"] - 1.0 + rng.normal(size=2), "b": p["b"]}
    gk.compare_stochastic_gradient(meddling, params, gradient=kept, seed=0, max_draws=64)
    assert all(np.array_equal(params[k], kept[k]) for k in kept)


def test_randomness_from_outside_rng_is_noticed():
    state = np.random.default_rng(99)
    report = gk.compare_stochastic_gradient(lambda w, rng: w + state.normal(size=2), W,
                                            gradient=W, seed=0, max_draws=64)
    assert any("not reproducible from its rng" in n for n in report.notes)
