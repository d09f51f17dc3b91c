"""Checks of Jacobian-vector, vector-Jacobian and Hessian-vector products.

Sources: More, Garbow & Hillstrom, ACM TOMS 7(1), 1981 (mgh_problems.py, from memory), with
exact Hessians from sympy and values from mpmath; the Gauss-Newton product 2 J^T J v of a
sum of squares, equal to the Hessian product where the residuals vanish (Nocedal & Wright,
Numerical Optimization, 2nd ed., section 10.2).  Seeds are fixed, so nothing here flakes.
"""
import functools

import autograd.numpy as anp
import mpmath
import numpy as np
import pytest
import sympy

import gradcheck_kit as gk
from mgh_problems import AG, BY_NAME, SYM, float_gradient

HESSIAN_PROBLEMS = ["rosenbrock", "beale", "helical_valley", "bard", "wood", "powell_singular",
                    "biggs_exp6", "trigonometric"]


@functools.lru_cache(maxsize=None)
def _symbolic(name):
    p = BY_NAME[name]
    xs = sympy.symbols(f"x0:{p.n}")
    hessian = sympy.hessian(p.cost(list(xs), SYM), xs)
    residuals = sympy.Matrix(p.residuals(list(xs), SYM))
    jacobian = residuals.jacobian(xs)
    return (sympy.lambdify(xs, hessian, modules="mpmath"),
            sympy.lambdify(xs, hessian, modules="numpy"),
            sympy.lambdify(xs, jacobian, modules="numpy"))


def exact_hvp(name, x, v):
    """sympy's Hessian evaluated by mpmath at 40 digits, times v."""
    high, _, _ = _symbolic(name)
    with mpmath.workdps(40):
        H = high(*[mpmath.mpf(float(t)) for t in x])
        return np.array([float(sum(H[i, j] * mpmath.mpf(float(v[j])) for j in range(len(x))))
                         for i in range(len(x))])


def float_hvp(name):
    _, low, _ = _symbolic(name)
    return lambda x, v: np.array(low(*x), dtype=float) @ v


@pytest.mark.parametrize("name", HESSIAN_PROBLEMS)
def test_hessian_products_of_mgh_agree_with_sympy(name):
    p = BY_NAME[name]
    x0 = np.array(p.x0, dtype=float)
    report = gk.compare_hvp(p.cost, x0, float_hvp(name), gradient=float_gradient(name), seed=0)
    assert report.passed, report.to_text()
    # the numeric H v is within its own error estimate of the exact product
    rng = np.random.default_rng(0)
    for row, worst in zip(report.rows, report.extra["worst_outputs"]):
        v = gk.products.random_direction(rng, x0)
        exact = exact_hvp(name, x0, v)[worst]
        assert abs(row.numeric - exact) <= row.error_estimate + 1e-12 * abs(exact), row


@pytest.mark.parametrize("name", ["rosenbrock", "wood", "biggs_exp6"])
def test_a_planted_bug_in_one_hessian_entry_is_found(name):
    p = BY_NAME[name]
    right = float_hvp(name)
    x0 = np.array(p.x0, dtype=float)
    H0 = np.array(_symbolic(name)[1](*x0), dtype=float)
    i, j = np.unravel_index(np.argmax(np.abs(H0)), H0.shape)

    def wrong(x, v):
        out = right(x, v)
        out[i] += 0.01 * float(np.array(_symbolic(name)[1](*x), dtype=float)[i, j]) * v[j]
        return out
    report = gk.compare_hvp(p.cost, x0, wrong, gradient=float_gradient(name), seed=0)
    assert not report.passed
    assert all(r.verdict == "disagree" for r in report.rows)
    assert all(r.name.endswith(f"x[{i}]") for r in report.rows)


def gauss_newton(name):
    """2 J^T J v: the Hessian product without the residuals' second derivatives."""
    jacobian = _symbolic(name)[2]

    def product(x, v):
        J = np.array(jacobian(*x), dtype=float)
        return 2 * J.T @ (J @ v)
    return product


@pytest.mark.parametrize("name", ["rosenbrock", "beale", "box_3d"])
def test_gauss_newton_passed_off_as_the_hessian_is_flagged_away_from_the_solution(name):
    p = BY_NAME[name]
    away = np.array(p.x0, dtype=float)
    report = gk.compare_hvp(p.cost, away, gauss_newton(name), gradient=float_gradient(name),
                            seed=1)
    assert not report.passed and "disagree" in report.counts
    # at a zero-residual minimiser the two products are equal, and the check says so
    solution = np.array(p.minimisers[0], dtype=float)
    at_solution = gk.compare_hvp(p.cost, solution, gauss_newton(name),
                                 gradient=float_gradient(name), seed=1)
    assert at_solution.passed, at_solution.to_text()


def test_hvp_defaults_to_autograd():
    p = BY_NAME["wood"]
    report = gk.compare_hvp(lambda x: p.cost(x, AG), np.array(p.x0, dtype=float), seed=2)
    assert report.passed and len(report.rows) == 3 and report.title.startswith("hessian")


A = np.array([[1.0, 2.0, -0.5], [0.3, -1.0, 0.8]])


def layer(p):
    return {"out": anp.tanh(anp.dot(A, p["w"]) + p["b"]), "norm": anp.sum(p["w"] ** 2)}


def layer_jvp(p, v):
    s = 1 - np.tanh(A @ p["w"] + p["b"]) ** 2
    return {"out": s * (A @ v["w"] + v["b"]), "norm": 2 * p["w"] @ v["w"]}


def layer_vjp(p, u):
    s = 1 - np.tanh(A @ p["w"] + p["b"]) ** 2
    return {"w": A.T @ (u["out"] * s) + 2 * u["norm"] * p["w"], "b": u["out"] * s}


POINT = {"w": np.array([0.2, -0.4, 0.9]), "b": np.array([0.1, -0.3])}


def test_jvp_and_vjp_of_a_tree_function_pass():
    assert gk.compare_jvp(layer, POINT, layer_jvp, seed=0).passed
    assert gk.compare_vjp(layer, POINT, layer_vjp, seed=0).passed
    assert gk.compare_jvp(layer, POINT, seed=0).passed          # autograd's forward product
    assert gk.compare_vjp(layer, POINT, seed=0).passed          # autograd's reverse product


def test_a_wrong_jvp_is_found_and_its_output_named():
    def wrong(p, v):
        out = layer_jvp(p, v)
        return {"out": out["out"], "norm": out["norm"] * 0.5}    # forgot the 2
    report = gk.compare_jvp(layer, POINT, wrong, seed=0)
    assert not report.passed
    assert all(r.name.endswith("at norm") for r in report.mismatches)
    assert "probes fail" in report.to_text().split("\n")[0]


def test_a_transposed_vjp_is_found():
    def transposed(p, u):
        s = 1 - np.tanh(A @ p["w"] + p["b"]) ** 2
        return {"w": (A.T @ A) @ p["w"] * 0 + A.T @ (u["out"] * s)[::-1] + 2 * u["norm"] *
                p["w"], "b": u["out"] * s}
    report = gk.compare_vjp(layer, POINT, transposed, seed=0)
    assert not report.passed and report.counts == {"disagree": 3}


def test_a_product_that_ignores_its_direction_is_named():
    def ignores(p, v):
        return layer_jvp(p, {"w": np.ones(3), "b": np.ones(2)})
    report = gk.compare_jvp(layer, POINT, ignores, seed=0)
    assert not report.passed
    assert any("returned the same values for 3 different v: it ignores its argument v" in t
               for t in report.problems)

    def ignores_u(p, u):
        return layer_vjp(p, {"out": np.ones(2), "norm": 1.0})
    report = gk.compare_vjp(layer, POINT, ignores_u, seed=0)
    assert any("ignores its argument u" in t for t in report.problems)


def test_wrong_shapes_and_non_finite_products_are_named():
    f = lambda x: anp.sin(x) * 2.0   # noqa: E731
    x = np.array([0.1, 0.2, 0.3])
    with pytest.raises(gk.CheckInputError, match=r"jvp: expected shape \(3,\).*got shape \(2,\)"):
        gk.compare_jvp(f, x, lambda x, v: np.zeros(2), seed=0)
    with pytest.raises(gk.CheckInputError, match=r"hvp for parameter 'x': expected shape \(3,\)"):
        gk.compare_hvp(lambda x: anp.sum(x ** 3), x, lambda x, v: np.zeros(4), seed=0)
    report = gk.compare_jvp(f, x, lambda x, v: np.full(3, np.nan), seed=0)
    assert not report.passed and report.counts == {"non-finite": 3}
    with pytest.raises(gk.CheckInputError, match="fun returned non-finite values at the base"), \
            np.errstate(invalid="ignore"):
        gk.compare_jvp(lambda x: np.log(x - 1), x, seed=0)


@pytest.mark.parametrize("call, message", [
    (lambda: gk.compare_jvp(3, POINT), "fun: expected a callable"),
    (lambda: gk.compare_jvp(layer, POINT, probes=0), "probes: expected an int >= 1"),
    (lambda: gk.compare_vjp(layer, POINT, seed=-1), "seed: expected None or an int >= 0"),
    (lambda: gk.compare_hvp(layer, POINT, gradient=np.ones(3)),
     "gradient: expected a function of params or None"),
    (lambda: gk.compare_jvp(layer, POINT, rtol=-1.0), "rtol: expected None or a finite number"),
])
def test_bad_options_are_named(call, message):
    with pytest.raises(gk.CheckInputError, match=message):
        call()


def test_tolerances_switch_to_numpy_rule():
    def slightly_off(p, v):
        out = layer_jvp(p, v)
        return {"out": out["out"] * (1 + 1e-7), "norm": out["norm"]}
    assert not gk.compare_jvp(layer, POINT, slightly_off, seed=0).passed
    assert gk.compare_jvp(layer, POINT, slightly_off, seed=0, rtol=1e-5).passed
