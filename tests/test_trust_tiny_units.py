"""Parameters in SI units, near 1e-10, with one entry far smaller.

Ten ions on a lattice of spacing 4e-10 m (positions jittered by 2e-11 m), with a
Lennard-Jones energy (sigma = 3.4e-10 m, epsilon = 1.65e-21 J, argon-like values quoted
from memory) and Coulomb's law (k = 8.9875517923e9 N m^2 / C^2, e = 1.602176634e-19 C,
CODATA).  The force formulas are the textbook derivatives of both energies.  One
coordinate of the particle at the origin is below 2^-40 of its scale of 1: the noise
lines moved it along that scale, carried the particle out of the cluster, and read the
change as noise; every coordinate then disagreed with every method (the values stayed
near 0 at steps sized from 1).
"""
import numpy as np
import pytest

import gradcheck_kit as gk

SIGMA, EPSILON, K, Q = 3.4e-10, 1.65e-21, 8.9875517923e9, 1.602176634e-19
N = 10
CHARGES = np.where(np.arange(N) % 2 == 0, 1.0, -1.0) * Q


def _pairs(x):
    p = x.reshape(N, 3)
    i, j = np.triu_indices(N, 1)
    d = p[i] - p[j]
    return i, j, d, np.sqrt((d ** 2).sum(1))


def energy(x):
    i, j, _, r = _pairs(x)
    s6 = (SIGMA / r) ** 6
    return np.sum(4 * EPSILON * (s6 ** 2 - s6) + K * CHARGES[i] * CHARGES[j] / r)


def gradient(x):
    i, j, d, r = _pairs(x)
    s6 = (SIGMA / r) ** 6
    de_dr = 4 * EPSILON * (-12 * s6 ** 2 + 6 * s6) / r - K * CHARGES[i] * CHARGES[j] / r ** 2
    g = np.zeros((N, 3))
    f = (de_dr / r)[:, None] * d
    np.add.at(g, i, f)
    np.add.at(g, j, -f)
    return g.ravel()


def _positions():
    rng = np.random.default_rng(3)
    grid = np.array([[a, b, c] for a in range(3) for b in range(3) for c in range(3)])[:N]
    x = (grid * 4e-10 + rng.normal(0, 2e-11, (N, 3))).ravel()
    x[2] = 3e-13          # far below 2^-40 of its scale of 1
    return x


@pytest.mark.parametrize("method", ["central", "auto"])
def test_ions_in_metres_pass(method):
    report = gk.compare_gradient(energy, _positions(), gradient, method=method)
    assert report.passed, report.to_text()


@pytest.mark.parametrize("method", ["central", "auto"])
def test_ions_in_metres_a_5_percent_error_is_caught(method):
    x = _positions()
    scale = np.ones(x.size)
    scale[4] = 1.05
    report = gk.compare_gradient(energy, x, lambda x: scale * gradient(x), method=method)
    assert not report.passed
    assert [row.flat_index for row in report.mismatches] == [4]
