"""Common machine-learning losses with hand-written gradients, on invented data.

Common practice, no source: these are the textbook forms of each loss and its
gradient.  Each factory returns a Case: the cost (written with autograd.numpy so
gradient=None works too), the hand-written gradient, a parameter point, and
per-sample costs so tests can plant a "dropped term" bug.
"""
from __future__ import annotations

from dataclasses import dataclass

import autograd.numpy as anp
import numpy as np


@dataclass
class Case:
    name: str
    cost: object
    gradient: object
    params: object
    per_sample: object = None     # params -> vector of per-sample costs (cost = mean + reg)


def _sigmoid(z):
    return 1 / (1 + np.exp(-z))


def logistic_l2(rng, n=40, d=5, lam=0.1):
    """Credit-default style: binary labels from invented features."""
    X = rng.normal(size=(n, d))
    y = (X @ rng.normal(size=d) + 0.3 * rng.normal(size=n) > 0).astype(float)

    def per_sample(p):
        z = anp.dot(X, p["w"]) + p["b"]
        return anp.log(1 + anp.exp(z)) - y * z

    def cost(p):
        return anp.mean(per_sample(p)) + lam / 2 * anp.sum(p["w"] ** 2)

    def grad(p):
        r = _sigmoid(X @ p["w"] + p["b"]) - y
        return {"w": X.T @ r / n + lam * p["w"], "b": float(np.mean(r))}

    return Case("logistic_l2", cost, grad, {"w": rng.normal(size=d), "b": 0.3}, per_sample)


def softmax_cross_entropy(rng, n=30, d=4, k=3):
    """Three-class sorting of invented parcels by size and weight features."""
    X = rng.normal(size=(n, d))
    labels = rng.integers(0, k, size=n)
    Y = np.eye(k)[labels]

    def per_sample(p):
        z = anp.dot(X, p["W"]) + p["b"]
        m = anp.max(z, axis=1, keepdims=True)
        lse = m[:, 0] + anp.log(anp.sum(anp.exp(z - m), axis=1))
        return lse - anp.sum(z * Y, axis=1)

    def cost(p):
        return anp.mean(per_sample(p))

    def grad(p):
        z = X @ p["W"] + p["b"]
        e = np.exp(z - z.max(axis=1, keepdims=True))
        P = e / e.sum(axis=1, keepdims=True)
        return {"W": X.T @ (P - Y) / n, "b": (P - Y).mean(axis=0)}

    params = {"W": 0.5 * rng.normal(size=(d, k)), "b": 0.1 * rng.normal(size=k)}
    return Case("softmax_cross_entropy", cost, grad, params, per_sample)


def tanh_network(rng, n=25, d=3, h=4):
    """A one-hidden-layer tanh regressor of an invented sensor reading."""
    X = rng.normal(size=(n, d))
    y = np.sin(X[:, 0]) + 0.5 * X[:, 1]

    def per_sample(p):
        a = anp.tanh(anp.dot(X, p["W1"]) + p["b1"])
        return 0.5 * (anp.dot(a, p["w2"]) + p["b2"] - y) ** 2

    def cost(p):
        return anp.mean(per_sample(p))

    def grad(p):
        a = np.tanh(X @ p["W1"] + p["b1"])
        r = (a @ p["w2"] + p["b2"] - y) / n
        da = np.outer(r, p["w2"]) * (1 - a ** 2)
        return {"W1": X.T @ da, "b1": da.sum(axis=0), "w2": a.T @ r, "b2": float(r.sum())}

    params = {"W1": rng.normal(size=(d, h)), "b1": 0.1 * rng.normal(size=h),
              "w2": rng.normal(size=h), "b2": 0.2}
    return Case("tanh_network", cost, grad, params, per_sample)


def poisson_regression(rng, n=40, d=4):
    """Counts of invented call-centre tickets per hour against workload features."""
    X = 0.5 * rng.normal(size=(n, d))
    w_true = rng.normal(size=d) * 0.5
    y = rng.poisson(np.exp(X @ w_true + 1.0)).astype(float)

    def per_sample(p):
        eta = anp.dot(X, p["w"]) + p["b"]
        return anp.exp(eta) - y * eta

    def cost(p):
        return anp.mean(per_sample(p))

    def grad(p):
        r = np.exp(X @ p["w"] + p["b"]) - y
        return {"w": X.T @ r / n, "b": float(r.mean())}

    return Case("poisson_regression", cost, grad, {"w": 0.3 * rng.normal(size=d), "b": 0.8},
                per_sample)


def matrix_factorisation(rng, m=6, n=5, r=2, lam=0.05):
    """Ratings of invented recipes by invented tasters, 60% observed."""
    R = rng.normal(size=(m, n))
    M = (rng.random(size=(m, n)) < 0.6).astype(float)

    def per_sample(p):
        E = anp.dot(p["U"], p["V"].T) - R
        return anp.reshape(0.5 * M * E ** 2, (-1,)) * (m * n)

    def cost(p):
        E = anp.dot(p["U"], p["V"].T) - R
        return 0.5 * anp.sum(M * E ** 2) + lam / 2 * (anp.sum(p["U"] ** 2) + anp.sum(p["V"] ** 2))

    def grad(p):
        E = M * (p["U"] @ p["V"].T - R)
        return {"U": E @ p["V"] + lam * p["U"], "V": E.T @ p["U"] + lam * p["V"]}

    params = {"U": rng.normal(size=(m, r)), "V": rng.normal(size=(n, r))}
    return Case("matrix_factorisation", cost, grad, params, per_sample)


def mixture_likelihood(rng, n=50, k=3):
    """Negative log-likelihood of a 1-d Gaussian mixture of invented commute times."""
    x = np.concatenate([rng.normal(-2, 0.5, n // 2), rng.normal(1.5, 1.0, n - n // 2)])

    def per_sample(p):
        logits, mu, log_s = p["logits"], p["mu"], p["log_sigma"]
        log_pi = logits - anp.log(anp.sum(anp.exp(logits)))
        z = (x[:, None] - mu) / anp.exp(log_s)
        comp = log_pi - 0.5 * z ** 2 - log_s - 0.5 * anp.log(2 * anp.pi)
        mx = anp.max(comp, axis=1, keepdims=True)
        return -(mx[:, 0] + anp.log(anp.sum(anp.exp(comp - mx), axis=1)))

    def cost(p):
        return anp.mean(per_sample(p))

    def grad(p):
        logits, mu, log_s = p["logits"], p["mu"], p["log_sigma"]
        pi = np.exp(logits - logits.max())
        pi /= pi.sum()
        s = np.exp(log_s)
        z = (x[:, None] - mu) / s
        comp = np.log(pi) - 0.5 * z ** 2 - log_s - 0.5 * np.log(2 * np.pi)
        resp = np.exp(comp - comp.max(axis=1, keepdims=True))
        resp /= resp.sum(axis=1, keepdims=True)
        return {"logits": -(resp - pi).mean(axis=0),
                "mu": -(resp * z / s).mean(axis=0),
                "log_sigma": -(resp * (z ** 2 - 1)).mean(axis=0)}

    params = {"logits": rng.normal(size=k) * 0.3, "mu": np.array([-1.5, 0.0, 1.0]),
              "log_sigma": np.zeros(k)}
    return Case("mixture_likelihood", cost, grad, params, per_sample)


FACTORIES = (logistic_l2, softmax_cross_entropy, tanh_network, poisson_regression,
             matrix_factorisation, mixture_likelihood)
