"""compare_gradient(..., with_rng=True): one draw of a random cost checked exactly.

The cost and the gradient are called as f(params, rng) with a generator seeded the same
way at every call (common random numbers, common practice for derivatives of simulations),
so a mini-batch and a dropout mask stay fixed across the stencil's points."""
import numpy as np
import pytest

import gradcheck_kit as gk

X = np.random.default_rng(11).normal(size=(40, 3))
Y = X @ np.array([0.7, -1.2, 0.4]) + 0.1
KEEP = 0.75


def batch_and_mask(rng):
    rows = rng.choice(len(X), size=8, replace=False)
    mask = (rng.random(3) < KEEP) / KEEP        # inverted dropout on the inputs' weights
    return rows, mask


def cost(w, rng):
    rows, mask = batch_and_mask(rng)
    r = X[rows] @ (w * mask) - Y[rows]
    return 0.5 * np.mean(r ** 2)


def gradient(w, rng):
    rows, mask = batch_and_mask(rng)
    r = X[rows] @ (w * mask) - Y[rows]
    return (X[rows].T @ r / len(rows)) * mask


W = np.array([0.2, 0.5, -0.3])


def test_one_draw_of_a_right_minibatch_dropout_gradient_passes():
    report = gk.compare_gradient(cost, W, gradient, with_rng=True, seed=4)
    assert report.passed, report
    assert any("with_rng" in note and "seeded" in note for note in report.notes)


def test_a_wrong_scaling_of_the_draw_is_caught():
    def unscaled(w, rng):       # the 1/KEEP of inverted dropout forgotten on the way back
        return gradient(w, rng) * KEEP
    live = 0
    for seed in range(4):
        report = gk.compare_gradient(cost, W, unscaled, with_rng=True, seed=seed)
        kept = [r for r in report.rows if r.numeric != 0]
        live += len(kept)
        # every weight the draw kept is off by KEEP, so each of them disagrees
        assert all(r.verdict == "disagree" for r in kept), report
        assert report.passed == (not kept)
    assert live > 0      # some draw kept a weight: the loop above tested something


def test_autograd_derives_the_drawn_cost_too():
    assert gk.compare_gradient(cost, W, with_rng=True, seed=1).passed


def test_the_seed_chooses_the_draw_and_repeats_it():
    a = gk.compare_gradient(cost, W, gradient, with_rng=True, seed=5)
    b = gk.compare_gradient(cost, W, gradient, with_rng=True, seed=5)
    assert [r.numeric for r in a.rows] == [r.numeric for r in b.rows]


def test_without_with_rng_a_cost_of_params_and_rng_gets_one_sentence():
    with pytest.raises(gk.CheckInputError, match="with_rng=True"):
        gk.compare_gradient(cost, W, gradient)


def test_with_rng_on_a_cost_of_params_alone_gets_one_sentence():
    with pytest.raises(gk.CheckInputError, match="takes one argument"):
        gk.compare_gradient(lambda w: np.sum(w ** 2), W, with_rng=True)


def test_with_rng_and_vectorized_are_refused_together():
    with pytest.raises(gk.CheckInputError, match="vectorized"):
        gk.compare_gradient(cost, W, gradient, with_rng=True, vectorized=True)


def test_a_random_cost_that_draws_its_own_numbers_is_still_not_deterministic():
    free = np.random.default_rng(3)
    report = gk.compare_gradient(lambda w: cost(w, free), W, lambda w: gradient(w, free))
    assert not report.passed
    assert any("not deterministic" in p for p in report.problems)


def test_the_caller_arrays_are_unchanged():
    w = W.copy()
    gk.compare_gradient(cost, w, gradient, with_rng=True, seed=2)
    assert np.array_equal(w, W)


def test_the_command_line_checks_one_draw_with_with_rng(tmp_path):
    import subprocess
    import sys
    import textwrap
    (tmp_path / "drawn.py").write_text(textwrap.dedent("""
        import numpy as np
        def cost(w, rng):
            keep = rng.random(w.size) < 0.7
            return 0.5 * np.sum((w * keep) ** 2)
        def grad(w, rng):
            keep = rng.random(w.size) < 0.7
            return w * keep
        def wrong(w, rng):
            return w
    """))
    np.save(tmp_path / "w.npy", np.array([0.3, -1.2, 0.8, 2.0]))
    codes = []
    for gradient in ("grad", "wrong"):
        out = subprocess.run([sys.executable, "-m", "gradcheck_kit", "check", "drawn.py:cost",
                              "--gradient", f"drawn.py:{gradient}", "--params", "w.npy",
                              "--with-rng", "--seed", "1"],
                             cwd=tmp_path, capture_output=True, text=True, timeout=300)
        codes.append(out.returncode)
        assert "Traceback" not in out.stderr
    assert codes == [0, 1]
