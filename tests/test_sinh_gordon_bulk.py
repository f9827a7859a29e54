"""The sinh-Gordon bulk energy density f = m^2 / (8 sin(pi B / 2)), verified from the TBA itself.

The TBA energy leaves out the bulk term (E_exact = E + f R), so f is minus the R^2 coefficient
of R E(R) at small R. Unlike Lee-Yang and E8 (tests/test_thermo.py), sinh-Gordon has no
power series there: the UV limit is a non-compact boson, and

    R E(R) = -(pi / 6) (1 - 24 P^2) - f R^2 + (smaller powers of R),

with P(R) -> 0 logarithmically. P is fixed by a zero-mode quantisation condition of the form
4 Q P (log(1/R) + const) + delta(P) = pi, delta odd in P, Q = b + 1/b, b^2 = B / (2 - B)
(Al.B. Zamolodchikov, J. Phys. A 39 (2006) 12863, from memory). Hence, exactly up to the
powers of R, log(1/R) = pi / (4 Q P) + an even power series in P. The test inverts the TBA
data for P with a trial f, fits that form by linear least squares, and takes the f for which
the form holds: it holds to rounding there (and only there), with the leading coefficient
pi / (4 Q), which checks the form itself.

docs/physics.md section 6 explains the form. The value and its sign agree with the general rule that gives the Lee-Yang and E8 values,
f = -m_1^2 / (8 sum_x n_11(x) sin(pi x)) for S_11 = prod_x f_x^n(x) (sinh-Gordon is
f_(B/2)^(-1); also Destri and de Vega, Nucl. Phys. B358 (1991) 251, from memory), and at
B = -2/3, where the sinh-Gordon S-matrix becomes the Lee-Yang one f_(2/3), the formula gives
the Lee-Yang value -1 / (4 sqrt 3).
"""

import math

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from tba import sinh_gordon, solve_radii
from tba.physics.thermo import thermodynamics

#: radii of the fit: down to 1e-12 (P ~ 0.02) and up to 0.05, where R^2 is 2.5e-3 of R E
RADII = np.geomspace(1e-12, 0.05, 50)
#: terms of the even series in P
DEGREE = 5


def expected(B):
    return 1.0 / (8.0 * math.sin(math.pi * B / 2))


def _q(B):
    b = math.sqrt(B / (2 - B))
    return b + 1 / b


def _r_times_energy(B):
    results = solve_radii(sinh_gordon(B), RADII[::-1], tol=1e-13)[::-1]
    assert all(r.converged for r in results)
    return np.array([r.radius * r.energy for r in results])


def _quantisation_fit(y, f):
    """Least-squares fit of log(1/R) = a / P + sum_k e_k P^(2k) with P from R E = y and the
    trial bulk term f; returns (a, rms residual in log R)."""
    P = np.sqrt((1 + 6 * (y + f * RADII ** 2) / math.pi) / 24)
    A = np.stack([1 / P] + [P ** (2 * k) for k in range(DEGREE + 1)], axis=1)
    coef = np.linalg.lstsq(A, np.log(1 / RADII), rcond=None)[0]
    return coef[0], float(np.sqrt(np.mean((A @ coef - np.log(1 / RADII)) ** 2)))


@pytest.mark.slow
@pytest.mark.parametrize("B", [1.0, 0.6])
def test_bulk_term_from_the_small_radius_expansion(B):
    y = _r_times_energy(B)
    f = expected(B)
    fit = minimize_scalar(lambda g: _quantisation_fit(y, g)[1], bracket=(0.5 * f, f, 1.5 * f),
                          tol=1e-12)
    # measured: 1 - 3e-8 (B = 1) and 1 - 8e-7 (B = 0.6) times the expected value
    assert fit.x == pytest.approx(f, rel=1e-5)
    a, rms = _quantisation_fit(y, fit.x)
    assert rms <= 1e-11  # the form holds to rounding (1e-12 in log R ~ 2e-14 in R E)
    assert a == pytest.approx(math.pi / (4 * _q(B)), rel=1e-10)  # measured: 1e-13
    # without the bulk term, with the opposite sign or twice it, the form fails by orders of
    # magnitude (measured: rms 6e6 to 1e8 times larger)
    for wrong in (0.0, -f, 2 * f):
        assert _quantisation_fit(y, wrong)[1] > 1e4 * rms


def test_model_carries_the_bulk_term():
    for B in (0.3, 0.6, 1.0, 1.4):
        assert sinh_gordon(B).bulk_energy_density == pytest.approx(expected(B), rel=1e-15)
    # B -> 2 - B is a symmetry of the S-matrix, and so of f
    assert sinh_gordon(0.6).bulk_energy_density == pytest.approx(sinh_gordon(1.4).bulk_energy_density,
                                                                 rel=1e-15)
    # the formula continued to B = -2/3 (S = f_(2/3), Lee-Yang) gives -1/(4 sqrt 3), the
    # Lee-Yang value checked by its own fit in tests/test_thermo.py
    assert expected(-2 / 3) == pytest.approx(-1 / (4 * math.sqrt(3)), rel=1e-15)


def test_thermodynamics_includes_the_bulk_term():
    # f(T) = T E(1/T) + f_bulk and u = E' + f_bulk (tba.physics.thermo)
    sg = sinh_gordon(0.6)
    (p,) = thermodynamics(sg, [2.0], tol=1e-13)
    assert p.bulk_included and p.message == ""
    E = solve_radii(sg, [0.5], tol=1e-13)[0].energy
    assert p.free_energy == pytest.approx(2.0 * E + expected(0.6), rel=1e-12)
