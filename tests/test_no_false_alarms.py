"""compare_gradient with its defaults must not cry wolf on correct gradients.

Sources: the More, Garbow & Hillstrom suite (ACM TOMS 1981) at x0, 10*x0 and at
known minimisers, where the gradient is exactly zero (from memory of the paper:
Rosenbrock (1, 1), Freudenstein-Roth (5, 4), Beale (3, 1/2), Box 3-D (1, 10, 1),
Powell singular and extended Powell at 0, Wood (1, 1, 1, 1), Biggs EXP6
(1, 10, 1, 5, 4, 3), helical valley (1, 0, 0), Brown badly scaled (1e6, 2e-6),
the extended Rosenbrock, variably dimensioned and Brown almost-linear functions
at all ones).  The gradients are sympy's exact derivatives evaluated in float64,
like a correct hand-written gradient.  Common machine-learning losses (common
practice) on invented data, with hand-written gradients and with autograd.
"""
import numpy as np
import pytest

import gradcheck_kit as gk
from ml_losses import FACTORIES
from mgh_problems import PROBLEMS


def mgh_points():
    for p in PROBLEMS:
        yield pytest.param(p, np.array(p.x0), id=f"{p.name}-x0")
        yield pytest.param(p, 10 * np.array(p.x0), id=f"{p.name}-10x0")
        for k, m in enumerate(p.minimisers):
            yield pytest.param(p, np.array(m), id=f"{p.name}-minimiser{k}")


@pytest.mark.parametrize("problem, x", list(mgh_points()))
def test_mgh_correct_gradient_passes(mgh_derivatives, problem, x):
    report = gk.compare_gradient(problem.cost, x, mgh_derivatives.float_gradient(problem.name))
    assert report.passed, report.to_text()


@pytest.mark.parametrize("problem, x", [pytest.param(p, np.array(m), id=p.name)
                                        for p in PROBLEMS for m in p.minimisers])
@pytest.mark.parametrize("method", ["richardson", "five-point", "complex-step"])
def test_mgh_minimisers_pass_with_every_accurate_method(mgh_derivatives, problem, x, method):
    report = gk.compare_gradient(problem.cost, x, mgh_derivatives.float_gradient(problem.name),
                                 method=method)
    assert report.passed, report.to_text()


@pytest.mark.parametrize("factory", FACTORIES, ids=lambda f: f.__name__)
@pytest.mark.parametrize("seed", range(3))
def test_ml_loss_hand_gradient_passes(factory, seed):
    case = factory(np.random.default_rng(seed))
    report = gk.compare_gradient(case.cost, case.params, case.gradient)
    assert report.passed, report.to_text()


@pytest.mark.parametrize("factory", FACTORIES, ids=lambda f: f.__name__)
def test_ml_loss_autograd_gradient_passes(factory):
    case = factory(np.random.default_rng(7))
    report = gk.compare_gradient(case.cost, case.params)
    assert report.passed, report.to_text()


@pytest.mark.parametrize("factory", FACTORIES, ids=lambda f: f.__name__)
def test_ml_loss_passes_with_richardson_too(factory):
    case = factory(np.random.default_rng(11))
    report = gk.compare_gradient(case.cost, case.params, case.gradient, method="richardson")
    assert report.passed, report.to_text()


def test_logistic_regression_at_its_fitted_minimum_passes():
    """A tiny gradient at an optimiser's answer is no reason to fail."""
    from scipy.optimize import minimize

    case = FACTORIES[0](np.random.default_rng(3))

    def flat(v):
        return case.cost({"w": v[:-1], "b": v[-1]})

    def flat_grad(v):
        g = case.gradient({"w": v[:-1], "b": v[-1]})
        return np.append(g["w"], g["b"])

    fit = minimize(flat, np.zeros(6), jac=flat_grad, method="BFGS", options={"gtol": 1e-12})
    params = {"w": fit.x[:-1], "b": float(fit.x[-1])}
    assert np.max(np.abs(flat_grad(fit.x))) < 1e-8
    report = gk.compare_gradient(case.cost, params, case.gradient)
    assert report.passed, report.to_text()
