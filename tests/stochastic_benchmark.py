"""Trust in the stochastic-gradient test: false alarms and detection, measured over seeds.

    python tests/stochastic_benchmark.py [--quick]

The corpus below (invented data) holds unbiased estimators, whose measured false-alarm
rate over many seeds must stay within a binomial bound of `level`, and estimators with the
planted bugs of the common kinds, whose exact means are known (closed forms or exact
enumeration over the batches), so the true bias of every coordinate is known:

- mini-batch least squares: divided by the data size N instead of the batch size B; an
  epoch in fixed order whose last partial batch is dropped, or weighted like a full batch;
- importance-sampled mini-batches: the weights 1/(N q_i) left out, or inverted;
- input dropout without its 1/(1-p) scaling;
- a score-function estimator: flipped sign; a baseline from the same samples without its
  leave-one-out correction (off by (K-1)/K);
- a reparameterised Gaussian expectation: one parameter's chain-rule factor missing.

Printed: per estimator and level, the runs, the false alarms (unbiased) or detections
(biased) with a Clopper-Pearson 95% interval (Clopper & Pearson, Biometrika 26(4), 1934,
through scipy.stats.beta), the mean draws used, and for the biased ones the power claim:
among coordinates whose true bias is at least the report's "detectable" value, the share
found (the report claims at least 95%).  The tests in test_stochastic_trust.py assert
looser versions of these numbers on fixed seeds.
"""
from __future__ import annotations

import argparse
import math
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import gradcheck_kit as gk  # noqa: E402
from gradcheck_kit.tree import flatten  # noqa: E402

# --- data (invented) ---------------------------------------------------------------------
_data = np.random.default_rng(20240611)
N, D, B = 203, 4, 16
X = _data.normal(size=(N, D)) * np.array([1.0, 2.0, 0.5, 1.5])
Y = X @ np.array([1.0, -2.0, 0.5, 0.0]) + _data.normal(size=N)
W0 = np.array([0.3, 0.1, -0.2, 0.4])
Q = np.linalg.norm(X, axis=1) + 0.2
Q = Q / Q.sum()                                                    # importance probabilities
KEEP = 0.75                                                        # dropout keeps 3 in 4
DROP_BATCH = 32


def _grads(w, rows):
    """Per-example gradients of 0.5 (x.w - y)^2, one row each."""
    return (X[rows] @ w - Y[rows])[:, None] * X[rows]


def ls_cost(w):
    return 0.5 * np.mean((X @ w - Y) ** 2)


def ls_gradient(w):
    return X.T @ (X @ w - Y) / N


def ls_minibatch(w, rng):
    return _grads(w, rng.choice(N, B, replace=False)).mean(axis=0)


def ls_divided_by_data_size(w, rng):
    return _grads(w, rng.choice(N, B, replace=False)).sum(axis=0) / N


# time-ordered readings whose newest ones drift: an epoch in fixed order ends in a partial
# batch of 4 that holds most of the drift
NE = 100
XE = np.column_stack([np.ones(NE), _data.normal(size=(NE, 2)), np.linspace(0, 1, NE)])
YE = XE @ np.array([0.5, 1.0, -1.0, 0.0]) + 4 * np.linspace(0, 1, NE) ** 6 + \
    0.3 * _data.normal(size=NE)
WE = np.array([0.5, 1.0, -1.0, 0.0])
BATCHES = [np.arange(lo, min(lo + B, NE)) for lo in range(0, NE, B)]   # 6 full + 1 of 4


def _epoch_grads(w, rows):
    return (XE[rows] @ w - YE[rows])[:, None] * XE[rows]


def epoch_cost(w):
    return 0.5 * np.mean((XE @ w - YE) ** 2)


def epoch_gradient(w):
    return XE.T @ (XE @ w - YE) / NE


def ls_epoch(w, rng):
    """One step of an epoch in fixed order at a random position, weighted by batch size."""
    rows = BATCHES[rng.integers(len(BATCHES))]
    return _epoch_grads(w, rows).sum(axis=0) * len(BATCHES) / NE


def ls_epoch_last_as_full(w, rng):
    return _epoch_grads(w, BATCHES[rng.integers(len(BATCHES))]).mean(axis=0)


def ls_epoch_drop_last(w, rng):
    return _epoch_grads(w, BATCHES[rng.integers(len(BATCHES) - 1)]).mean(axis=0)


def importance(w, rng):
    rows = rng.choice(N, B, p=Q)
    return (_grads(w, rows) / (N * Q[rows])[:, None]).mean(axis=0)


def importance_unweighted(w, rng):
    return _grads(w, rng.choice(N, B, p=Q)).mean(axis=0)


def importance_inverted(w, rng):
    rows = rng.choice(N, B, p=Q)
    return (_grads(w, rows) * (N * Q[rows])[:, None]).mean(axis=0)


def _mean_of_batch_means(w, batches):
    return np.mean([_epoch_grads(w, b).mean(axis=0) for b in batches], axis=0)


# dropout on the inputs of a linear model; expected cost in closed form:
# E[(w.(m*x)/k - y)^2] = (w.x - y)^2 + (1-k)/k sum_j w_j^2 x_j^2, since m_j/k has mean 1 and
# variance (1-k)/k for m_j ~ Bernoulli(k) (derived here)
def dropout_cost(w):
    return 0.5 * np.mean((X @ w - Y) ** 2 + (1 - KEEP) / KEEP * (X ** 2) @ (w ** 2))


def dropout_gradient(w):
    return ls_gradient(w) + (1 - KEEP) / KEEP * np.mean(X ** 2, axis=0) * w


def dropout(w, rng):
    rows = rng.choice(N, DROP_BATCH, replace=False)
    xm = X[rows] * (rng.random((DROP_BATCH, D)) < KEEP) / KEEP
    return ((xm @ w - Y[rows])[:, None] * xm).mean(axis=0)


def dropout_unscaled(w, rng):
    rows = rng.choice(N, DROP_BATCH, replace=False)
    xm = X[rows] * (rng.random((DROP_BATCH, D)) < KEEP)
    return ((xm @ w - Y[rows])[:, None] * xm).mean(axis=0)


def dropout_unscaled_mean(w):
    """E[(m*x).w - y)(m*x)] = k^2 (x.w) x + k(1-k) x^2 w - k y x, averaged over the data."""
    k = KEEP
    return np.mean(k * k * (X @ w)[:, None] * X + k * (1 - k) * X ** 2 * w
                   - k * Y[:, None] * X, axis=0)


# reparameterised Gaussian: J = sum_j E cos(mu_j + sigma_j z) = sum_j cos(mu_j) e^{-sigma_j^2/2}
# (the normal characteristic function); d/dlog_sigma uses Stein's lemma E[z g(z)] = E[g'(z)]
GAUSS = {"mu": np.array([0.4, -1.1, 2.0]), "log_sigma": np.log(np.array([0.5, 1.0, 1.6]))}
SAMPLES = 4


def gauss_cost(p):
    s = np.exp(p["log_sigma"])
    return float(np.sum(np.cos(p["mu"]) * np.exp(-s ** 2 / 2)))


def gauss_gradient(p):
    s = np.exp(p["log_sigma"])
    e = np.exp(-s ** 2 / 2)
    return {"mu": -np.sin(p["mu"]) * e, "log_sigma": -np.cos(p["mu"]) * e * s ** 2}


def gauss(p, rng):
    s = np.exp(p["log_sigma"])
    z = rng.standard_normal((SAMPLES, 3))
    d = -np.sin(p["mu"] + s * z)
    return {"mu": d.mean(axis=0), "log_sigma": (d * s * z).mean(axis=0)}


def gauss_missing_chain_factor(p, rng):
    s = np.exp(p["log_sigma"])
    z = rng.standard_normal((SAMPLES, 3))
    d = -np.sin(p["mu"] + s * z)
    return {"mu": d.mean(axis=0), "log_sigma": (d * z).mean(axis=0)}


def gauss_missing_chain_factor_mean(p):
    g = gauss_gradient(p)
    return {"mu": g["mu"], "log_sigma": g["log_sigma"] / np.exp(p["log_sigma"])}


# score function: J = E_{x ~ N(theta, I)} sum_j exp(A x_j) = sum_j exp(A theta_j + A^2 / 2)
THETA = np.array([0.2, -0.5, 0.8])
A = 0.7
K = 8


def score_cost(t):
    return float(np.sum(np.exp(A * t + A * A / 2)))


def score_gradient(t):
    return A * np.exp(A * t + A * A / 2)


def _score_draws(t, rng):
    x = t + rng.standard_normal((K, t.size))
    return np.exp(A * x).sum(axis=1), x - t


def score_plain(t, rng):
    """No baseline: unbiased, heavy-tailed."""
    f, s = _score_draws(t, rng)
    return (f[:, None] * s).mean(axis=0)


def score_leave_one_out(t, rng):
    f, s = _score_draws(t, rng)
    b = (f.sum() - f) / (K - 1)
    return ((f - b)[:, None] * s).mean(axis=0)


def score_baseline_uncorrected(t, rng):
    f, s = _score_draws(t, rng)
    return ((f - f.mean())[:, None] * s).mean(axis=0)


def score_flipped(t, rng):
    return -score_leave_one_out(t, rng)


@dataclass
class Estimator:
    name: str
    sample: object
    params: object
    gradient: object          # the exact full gradient (function of params)
    cost: object              # the deterministic full cost
    mean: object = None       # the exact mean of the estimator (function); None: unbiased
    bug: str = ""
    extra: dict = field(default_factory=dict)

    @property
    def biased(self) -> bool:
        return self.mean is not None

    def true_bias(self) -> np.ndarray:
        """Exact mean minus exact gradient, flat, in params' coordinate order."""
        layout = flatten(self.params)[1]
        from gradcheck_kit.tree import flatten_like
        exact = flatten_like(self.gradient(self.params), layout, "gradient")
        if self.mean is None:
            return np.zeros_like(exact)
        return flatten_like(self.mean(self.params), layout, "mean") - exact


UNBIASED = [
    Estimator("least squares, mini-batch", ls_minibatch, W0, ls_gradient, ls_cost),
    Estimator("least squares, epoch step", ls_epoch, WE, epoch_gradient, epoch_cost),
    Estimator("importance-sampled batch", importance, W0, ls_gradient, ls_cost),
    Estimator("input dropout, scaled", dropout, W0, dropout_gradient, dropout_cost),
    Estimator("reparameterised Gaussian", gauss, GAUSS, gauss_gradient, gauss_cost),
    Estimator("score function, no baseline (heavy tails)", score_plain, THETA, score_gradient,
              score_cost),
    Estimator("score function, leave-one-out baseline", score_leave_one_out, THETA,
              score_gradient, score_cost),
]

PLANTED = [
    Estimator("least squares, divided by N", ls_divided_by_data_size, W0, ls_gradient, ls_cost,
              lambda w: ls_gradient(w) * B / N, "factor B/N"),
    Estimator("epoch, last partial batch dropped", ls_epoch_drop_last, WE, epoch_gradient,
              epoch_cost, lambda w: _mean_of_batch_means(w, BATCHES[:-1]), "dropped last batch"),
    Estimator("epoch, last partial batch as full", ls_epoch_last_as_full, WE, epoch_gradient,
              epoch_cost, lambda w: _mean_of_batch_means(w, BATCHES), "over-weighted last batch"),
    Estimator("importance weights left out", importance_unweighted, W0, ls_gradient, ls_cost,
              lambda w: Q @ _grads(w, np.arange(N)), "importance weights off"),
    Estimator("importance weights inverted", importance_inverted, W0, ls_gradient, ls_cost,
              lambda w: N * (Q ** 2) @ _grads(w, np.arange(N)), "importance weights off"),
    Estimator("dropout without 1/(1-p)", dropout_unscaled, W0, dropout_gradient, dropout_cost,
              dropout_unscaled_mean, "missing 1/(1-p)"),
    Estimator("score function, flipped sign", score_flipped, THETA, score_gradient, score_cost,
              lambda t: -score_gradient(t), "flipped sign"),
    Estimator("score function, baseline uncorrected", score_baseline_uncorrected, THETA,
              score_gradient, score_cost, lambda t: score_gradient(t) * (K - 1) / K,
              "missing baseline correction"),
    Estimator("Gaussian, chain factor missing", gauss_missing_chain_factor, GAUSS,
              gauss_gradient, gauss_cost, gauss_missing_chain_factor_mean, "one parameter"),
]


def check(est: Estimator, seed: int, level: float, reference: str = "gradient", **options):
    """One check of `est` with the exact gradient (or its cost) as the reference."""
    where = {"gradient": est.gradient} if reference == "gradient" else {"cost": est.cost}
    return gk.compare_stochastic_gradient(est.sample, est.params, level=level, seed=seed,
                                          **where, **options)


def false_alarms(est: Estimator, seeds, level: float, **options) -> tuple:
    """(runs with any disagree, runs, mean draws)."""
    alarms, draws = 0, []
    for seed in seeds:
        report = check(est, seed, level, **options)
        alarms += any(r.verdict == "disagree" for r in report.rows)
        draws.append(report.draws)
    return alarms, len(seeds), float(np.mean(draws))


def detection(est: Estimator, seeds, level: float, **options) -> dict:
    """Runs that found the bug, and the power claim checked against the true bias."""
    bias = est.true_bias()
    found, claimed, kept, draws = 0, 0, 0, []
    for seed in seeds:
        report = check(est, seed, level, **options)
        found += not report.passed
        draws.append(report.draws)
        for r in report.rows:
            if math.isfinite(r.detectable) and abs(bias[r.flat_index]) >= r.detectable * r.scale:
                claimed += 1
                kept += r.verdict == "disagree"
    return {"found": found, "runs": len(seeds), "claimed": claimed, "kept": kept,
            "draws": float(np.mean(draws))}


def clopper_pearson(k: int, n: int, confidence: float = 0.95) -> tuple:
    """Exact binomial interval (Clopper & Pearson 1934) through scipy.stats.beta."""
    from scipy.stats import beta
    a = (1 - confidence) / 2
    low = 0.0 if k == 0 else float(beta.ppf(a, k, n - k + 1))
    high = 1.0 if k == n else float(beta.ppf(1 - a, k + 1, n - k))
    return low, high


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer seeds")
    args = parser.parse_args(argv)
    plan = [(0.1, 100 if args.quick else 400), (0.01, 200 if args.quick else 1000),
            (1e-3, 200 if args.quick else 1000)]
    t0 = time.time()
    print("false alarms of unbiased estimators (any 'disagree' in a run), reference gradient=")
    print(f"  {'estimator':<44} {'level':>6} {'runs':>5} {'alarms':>6} {'rate':>7} "
          f"{'95% interval':>17} {'draws':>6}")
    totals = {}
    for level, runs in plan:
        for est in UNBIASED:
            k, n, d = false_alarms(est, range(runs), level)
            lo, hi = clopper_pearson(k, n)
            totals.setdefault(level, [0, 0])
            totals[level][0] += k
            totals[level][1] += n
            print(f"  {est.name:<44} {level:>6g} {n:>5} {k:>6} {k / n:>7.4f} "
                  f"[{lo:.4f}, {hi:.4f}] {d:>6.0f}")
    for level, (k, n) in totals.items():
        lo, hi = clopper_pearson(k, n)
        print(f"  all unbiased estimators at level {level:g}: {k} of {n} runs, rate {k / n:.4f} "
              f"(95% interval [{lo:.4f}, {hi:.4f}])")
    runs = 40 if args.quick else 200
    print(f"false alarms with cost= as the reference (numeric, its error estimates included), "
          f"level 0.1, {runs} seeds")
    for est in UNBIASED:
        k, n, d = false_alarms(est, range(runs), 0.1, reference="cost")
        print(f"  {est.name:<44} {k:>4} of {n:<4} draws {d:>6.0f}")
    runs = 40 if args.quick else 200
    print(f"planted bugs at level 1e-3, {runs} seeds: runs that fail, and the power claim "
          "(coordinates whose true bias >= the stated detectable one: share found)")
    for est in PLANTED:
        r = detection(est, range(runs), 1e-3)
        share = r["kept"] / r["claimed"] if r["claimed"] else float("nan")
        print(f"  {est.name:<40} [{est.bug}] found {r['found']:>3}/{r['runs']}  claim held "
              f"{r['kept']}/{r['claimed']} ({share:.3f})  draws {r['draws']:.0f}")
    print(f"({time.time() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
