"""Derivatives of special functions, from the handbook, through scipy.special.

Sources: DLMF 5.2.2 (psi(x) = Gamma'(x) / Gamma(x), so d/dx ln Gamma(x) = psi(x)),
DLMF 7.10.1 (d/dx erf(x) = 2/sqrt(pi) exp(-x^2)), DLMF 10.6.3 (C0'(z) = -C1(z) for
the cylinder functions, so J0'(x) = -J1(x)), DLMF 5.5.2 (psi(x + 1) = psi(x) + 1/x);
equation numbers quoted from memory.  mpmath's high-precision numeric derivative
(mpmath.diff) as a reference library.
"""
import mpmath
import numpy as np
import pytest
from scipy import special

import gradcheck_kit as gk

X = np.array([0.3, 1.7, 4.2, 9.5])


def test_log_gamma_against_digamma():
    """gammaln is real-only, so auto falls back to Richardson; DLMF 5.2.2."""
    report = gk.compare_gradient(lambda x: np.sum(special.gammaln(x)), X, special.digamma)
    assert report.passed and report.method == "richardson", report.to_text()


def test_complex_log_gamma_by_complex_step_is_exact_to_rounding():
    """loggamma is complex-analytic off the negative axis: DLMF 5.2.2 again."""
    d = gk.numeric_gradient(lambda x: np.sum(special.loggamma(x)), X, method="complex-step")
    np.testing.assert_allclose(d, special.digamma(X), rtol=1e-14)


def test_erf_against_its_handbook_derivative():
    """DLMF 7.10.1; scipy's erf accepts complex input, so auto uses the complex step."""
    x = np.array([-1.5, -0.2, 0.0, 0.7, 2.5])
    report = gk.compare_gradient(lambda v: np.sum(special.erf(v)), x,
                                 lambda v: 2 / np.sqrt(np.pi) * np.exp(-v ** 2))
    assert report.passed and report.method == "complex-step", report.to_text()


def test_bessel_j0_derivative_is_minus_j1():
    """DLMF 10.6.3, with j0 (real only) and jv(0, z) (complex-capable)."""
    x = np.array([0.5, 2.4, 3.8, 7.0])
    for cost in (lambda v: np.sum(special.j0(v)), lambda v: np.sum(special.jv(0, v))):
        report = gk.compare_gradient(cost, x, lambda v: -special.j1(v))
        assert report.passed, report.to_text()


def test_a_wrong_handbook_formula_is_caught():
    """Using psi(x + 1) = psi(x) + 1/x (DLMF 5.5.2) in place of psi(x) is a classic slip."""
    report = gk.compare_gradient(lambda x: np.sum(special.gammaln(x)), X,
                                 lambda x: special.digamma(x + 1))
    assert not report.passed
    assert {r.name for r in report.mismatches} == {f"x[{i}]" for i in range(4)}


@pytest.mark.parametrize("method", ["richardson", "five-point", "central"])
def test_agrees_with_mpmath_diff(method):
    """mpmath.diff at 30 digits as the reference derivative of a mixed expression."""
    def f(v):
        return np.sum(np.exp(-v ** 2 / 3) * np.cos(2 * v) + np.log1p(v ** 2))

    ref = [float(mpmath.diff(lambda t: mpmath.exp(-t ** 2 / 3) * mpmath.cos(2 * t)
                             + mpmath.log(1 + t ** 2), mpmath.mpf(v))) for v in X]
    d = gk.numeric_gradient(f, X, method=method)
    tol = 1e-6 if method == "central" else 1e-9
    np.testing.assert_allclose(d, ref, rtol=0, atol=tol * np.max(np.abs(ref)))
