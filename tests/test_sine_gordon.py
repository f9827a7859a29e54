"""Sine-Gordon at its reflectionless points xi = 1/N (tba/models/sine_gordon.py).

Checks: the soliton amplitude against the integral representation of A.B. Zamolodchikov and
Al.B. Zamolodchikov, Ann. Phys. 120 (1979) 253 (mpmath quadrature); crossing; breather masses
2 M sin(n pi xi / 2) (Dashen, Hasslacher and Neveu, Phys. Rev. D11 (1975) 3424; ZZ 1979); the
breather amplitudes against the bootstrap from the soliton ones and against the published
S_(B1 B1) and S_(s B1); the conserved charges against the fusion rule; c_eff = 1 (dilogarithm sum
and solver); the bulk energy -(M^2/4) tan(pi xi/2) (Al.B. Zamolodchikov, Int. J. Mod. Phys. A10
(1995) 1125, from memory) against the kernels' tails and a small-R fit; and the large-R
expansion of the ground state, whose leading term is -sum_a m_a K_1(m_a R) / pi.
"""

import math

import mpmath
import numpy as np
import pytest
from reference import leading_order_energy, second_order_energy
from scipy.special import k1

from tba import solve_ground_state, solve_radii
from tba.models import sine_gordon
from tba.models.base import bulk_energy_density
from tba.models.cdd import higher_spin
from tba.models.uv import uv_central_charge


def species(model, label):
    return model.labels.index(label)


def zz_soliton(N, t):
    """S_0(t) = -exp(-i int_0^inf dk/k sin(k t) sinh(pi k (1 - xi)/2) / (sinh(pi k xi/2) cosh(pi k/2)))."""
    xi = mpmath.mpf(1) / N
    g = lambda k: (mpmath.sin(k * t) * mpmath.sinh(mpmath.pi * k * (1 - xi) / 2)  # noqa: E731
                   / (k * mpmath.sinh(mpmath.pi * k * xi / 2) * mpmath.cosh(mpmath.pi * k / 2)))
    integral = mpmath.quad(g, mpmath.linspace(0, 30 * N, 6 * N + 1))
    return complex(-mpmath.exp(-1j * integral))


@pytest.mark.parametrize("N", [1, 2, 3, 4, 6])
def test_soliton_amplitude_is_the_zz_integral(N):
    model = sine_gordon(N)
    s = species(model, "s")
    for t in (0.0, 0.37, -1.2, 2.9):
        with mpmath.workdps(20):
            expected = zz_soliton(N, mpmath.mpf(t))
        assert model.s_matrix(np.array(t))[s, s] == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize("N", [2, 3, 5])
def test_no_reflection_and_crossing(N):
    # S_T = sinh(t/xi) / sinh((i pi - t)/xi) S_0 (ZZ 1979) and S_T(t) = S_0(i pi - t)
    model = sine_gordon(N)
    s, sb = species(model, "s"), species(model, "sbar")
    t = np.array([0.4 + 0.1j, -0.9 + 0.03j, 1.7])
    S = model.s_matrix(t)
    transmission = np.sinh(N * t) / np.sinh(N * (1j * np.pi - t)) * S[s, s]
    np.testing.assert_allclose(S[s, sb], transmission, rtol=1e-11)
    np.testing.assert_allclose(S[s, sb], model.s_matrix(1j * np.pi - t)[s, s], rtol=1e-11)
    assert model.antiparticle[s] == sb and model.antiparticle[sb] == s
    assert np.all(np.diag(model.sign) == -1)   # every species a fermion


@pytest.mark.parametrize("N", [1, 2, 3, 4, 7])
def test_masses(N):
    model = sine_gordon(N)
    M = model.masses[species(model, "s")]
    assert model.n_species == N + 1 and model.masses.min() == 1.0
    for n in range(1, N):
        assert model.masses[species(model, f"B{n}")] == pytest.approx(2 * M * math.sin(n * math.pi / (2 * N)), rel=1e-14)


@pytest.mark.parametrize("N", [2, 3, 4, 6])
def test_breathers_by_the_bootstrap(N):
    # B_n is the s s-bar bound state at t = i u_n, u_n = pi (1 - n xi):
    # S_(B_n d)(t) = S_(s d)(t + i u_n/2) S_(sbar d)(t - i u_n/2) for every d
    model = sine_gordon(N)
    s, sb = species(model, "s"), species(model, "sbar")
    t = np.array([0.31, -1.4 + 0.05j])
    for n in range(1, N):
        u = math.pi * (1 - n / N)
        fused = model.s_matrix(t + 0.5j * u)[s] * model.s_matrix(t - 0.5j * u)[sb]
        np.testing.assert_allclose(model.s_matrix(t)[species(model, f"B{n}")], fused, rtol=1e-10)
    # published closed forms (ZZ 1979): S_(B1 B1) = f_xi, S_(s B1) = f with sin(pi y) = cos(pi xi/2)
    b1 = species(model, "B1")
    f = lambda a: (np.sinh(t) + 1j * a) / (np.sinh(t) - 1j * a)  # noqa: E731
    np.testing.assert_allclose(model.s_matrix(t)[b1, b1], f(math.sin(math.pi / N)), rtol=1e-12)
    np.testing.assert_allclose(model.s_matrix(t)[s, b1], f(math.cos(math.pi / (2 * N))), rtol=1e-12)


@pytest.mark.parametrize("spin", [1, 3, 5, 7])
def test_charges_obey_the_fusion_rule(spin):
    # q_s(B_n) = q_s(s) e^{i s u_n/2} + q_s(sbar) e^{-i s u_n/2} (tba/models/charges.py), and the
    # deformed S-matrix satisfies the same bootstrap as the undeformed one
    N = 5
    model = sine_gordon(N)
    q = model.charges(spin)
    s, sb = species(model, "s"), species(model, "sbar")
    for n in range(1, N):
        u = math.pi * (1 - n / N)
        fused = q[s] * np.exp(0.5j * spin * u) + q[sb] * np.exp(-0.5j * spin * u)
        assert q[species(model, f"B{n}")] == pytest.approx(fused, abs=1e-12)
    if spin == 1:
        np.testing.assert_array_equal(q, model.masses)
    deformation = higher_spin(spin, 0.03)
    t = np.array([0.2, -0.7 + 0.04j])
    full = lambda z: model.s_matrix(z) * deformation.value(model, z)  # noqa: E731
    u = math.pi * (1 - 2 / N)
    np.testing.assert_allclose(full(t)[species(model, "B2")],
                               full(t + 0.5j * u)[s] * full(t - 0.5j * u)[sb], rtol=1e-10)
    with pytest.raises(ValueError, match="spin 2.*odd s"):
        model.charges(2)


def test_uv_central_charge():
    # c_eff = 1: the compact boson (dilogarithm sum, and the solver at R = 1e-5)
    for N in range(1, 13):
        assert uv_central_charge(sine_gordon(N)) == pytest.approx(1.0, rel=1e-13)
    for N in (1, 2, 3, 5):
        res = solve_ground_state(sine_gordon(N), 1e-5)
        assert res.converged, res.message
        assert -6e-5 * res.energy / math.pi == pytest.approx(1.0, abs=1e-8)


def test_free_dirac_point():
    # N = 1 (beta^2 = 4 pi): a free Dirac fermion, two free Majoranas: E_0 = 2 E_NS(R)
    from reference import free_fermion_ns_energy

    res = solve_ground_state(sine_gordon(1), 0.7, tol=1e-13)
    assert res.energy == pytest.approx(2 * free_fermion_ns_energy(0.7), rel=1e-12)


@pytest.mark.slow
def test_bulk_energy_density():
    # -(M^2/4) tan(pi / 2N) against f = -m_1^2 / (2 C_11) from the kernels' tails, two
    # independent routes; then a small-R fit at N = 3: R E = -pi/6 - f R^2 + sum_k a_k R^(3k)
    # (conformal perturbation theory in cos(beta phi), dimension 2 - Delta = 3/2 at Delta = 1/2,
    # even orders only; from memory)
    for N in (2, 3, 4, 6, 9):
        model = sine_gordon(N)
        assert bulk_energy_density(model.masses, model.blocks) == pytest.approx(model.bulk_energy_density, rel=1e-13)
    assert sine_gordon(1).bulk_energy_density is None
    model = sine_gordon(3)
    radii = np.geomspace(0.1, 1.5, 16)
    results = solve_radii(model, radii[::-1], tol=1e-13)[::-1]
    y = np.array([r.radius * r.energy for r in results])
    powers = [0, 2, 3, 6, 9, 12, 15, 18]
    A = np.stack([radii ** p for p in powers], 1)
    coef = np.linalg.lstsq(A, y, rcond=None)[0]
    assert np.max(np.abs(A @ coef - y)) <= 1e-12
    assert coef[0] == pytest.approx(-math.pi / 6, rel=1e-11)
    assert coef[1] == pytest.approx(-model.bulk_energy_density, rel=1e-8)


@pytest.mark.parametrize("N", [2, 3, 5])
def test_large_radius(N):
    # E_0(R) -> -sum_a m_a K_1(m_a R) / pi (Luscher-type leading term: one virtual particle of
    # each species around the circle), relative corrections of order e^{-m_1 R}, which the
    # second-order term accounts for (the rest is third order)
    model = sine_gordon(N)
    R = 8.0
    res = solve_ground_state(model, R, tol=1e-13)
    first = leading_order_energy(model.masses, R)
    second = second_order_energy(model.masses, model.kernel, R, h=0.02)
    assert first == pytest.approx(-sum(m * k1(m * R) for m in model.masses) / math.pi, rel=1e-15)
    assert abs(res.energy / first - 1) < 3 * math.exp(-R)
    assert abs(res.energy - second) < 2e-3 * abs(res.energy - first)
