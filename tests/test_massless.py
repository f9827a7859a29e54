"""Massless species and the free massless theories: energies, momenta, the TTbar kernel between
chiralities, the ground state of the TTbar-deformed c = 1/2, 1 and 24 theories against the closed
form, independence of the scale M, branch point, second branch and complex pair, derivatives and
thermodynamics.

The closed form of every deformed conformal level (docs/physics.md sections 4 and 9):
E = (R / 2 alpha) (sqrt(1 + 4 alpha E0 / R + 4 alpha^2 P^2 / R^2) - 1), E0 = -pi c / (6 R) for the
ground state; it integrates the Burgers equation (F.A. Smirnov and A.B. Zamolodchikov, Nucl. Phys.
B915 (2017) 363; A. Cavaglià, S. Negro, I.M. Szécsényi and R. Tateo, JHEP 10 (2016) 112; from
memory), and for c = 24 it is the light-cone spectrum of the closed bosonic string in D = 26 with
tension 1 / (2 alpha) (J.F. Arvis, Phys. Lett. B127 (1983) 106, from memory). The closed form is
written out here independently of tba.cft_energy.
"""

import cmath
import math

import numpy as np
import pytest

import tba
from tba.models.uv import ir_central_charge, uv_central_charge

FERMION = tba.massless_fermion()
BOSON = tba.massless_bosons(1)
STRING = tba.massless_bosons(24)
THEORIES = [pytest.param(FERMION, 0.5, id="c=1/2"), pytest.param(BOSON, 1.0, id="c=1"),
            pytest.param(STRING, 24.0, id="c=24")]


def closed_form(R, alpha, c, D=0.0, Dbar=0.0):
    """The deformed CFT level, complex past its branch point (the root with Im E >= 0), written
    as (R / 2 alpha) x / (sqrt(1 + x) + 1) to avoid the cancellation in sqrt(1 + x) - 1."""
    E0 = 2 * math.pi * (D + Dbar - c / 12) / R
    P = 2 * math.pi * (D - Dbar) / R
    x = 4 * alpha * E0 / R + 4 * alpha ** 2 * P ** 2 / R ** 2
    return (2 * E0 + 2 * alpha * P * P / R) / (cmath.sqrt(1 + x) + 1)


def test_light_cone_energies_and_the_ttbar_phase():
    # e +- p = mu^{+-} e^{+-t} (docs/physics.md section 9): right movers e = p = (M/2) e^t,
    # left movers e = -p = (M/2) e^{-t}; massive m cosh t, m sinh t
    t = np.linspace(-3, 3, 7)
    m = tba.user_model(masses=[2.0, 3.0, 5.0], blocks=[[{}] * 3] * 3,
                       chirality=["massive", "right", "left"])
    e, p = m.energies(t), m.momenta(t)
    np.testing.assert_allclose(e, [2 * np.cosh(t), 1.5 * np.exp(t), 2.5 * np.exp(-t)], rtol=1e-15)
    np.testing.assert_allclose(p, [2 * np.sinh(t), 1.5 * np.exp(t), -2.5 * np.exp(-t)], rtol=1e-15)
    # the TTbar phase alpha (p_a e_b - e_a p_b) at t = t_a - t_b: m_a m_b sinh t for massive
    # pairs, (M_R M_L / 2) e^t between a right and a left mover, 0 between two right movers
    # (epsilon_{mu nu} p^mu p^nu of two parallel light-like vectors vanishes)
    phase = m.ttbar_phase(t)
    np.testing.assert_allclose(phase[1, 2], 3.0 * 5.0 / 2 * np.exp(t), rtol=1e-15)
    np.testing.assert_allclose(phase[2, 1], -3.0 * 5.0 / 2 * np.exp(-t), rtol=1e-15)
    assert np.all(phase[1, 1] == 0) and np.all(phase[2, 2] == 0)
    ta, tb = 0.7, -0.4  # the definition itself, at two rapidities
    ea, pa = m.energies(np.array(ta)), m.momenta(np.array(ta))
    eb, pb = m.energies(np.array(tb)), m.momenta(np.array(tb))
    np.testing.assert_allclose(m.ttbar_phase(np.array(ta - tb)), np.outer(pa, eb) - np.outer(ea, pb),
                               rtol=1e-14, atol=1e-15)


def test_massless_phase_is_the_massless_limit_of_the_massive_one():
    # a massive particle of mass m at rapidity t + log(M/m) becomes a right mover of scale M as
    # m -> 0, one at t - log(M/m) a left mover: m^2 sinh(t_1 - t_2 + 2 log(M/m)) -> (M^2/2) e^{t_1 - t_2}
    # (the construction of massless TBAs as limits, Al.B. Zamolodchikov, Nucl. Phys. B358 (1991)
    # 524, from memory)
    M, u = 1.3, 0.45
    m = 1e-6
    massive = m * m * math.sinh(u + 2 * math.log(M / m))
    assert massive == pytest.approx(tba.massless_fermion(M).ttbar_phase(np.array(u))[0, 1], rel=1e-12)


def test_ttbar_value_and_kernel_between_chiralities():
    # CDD.value is exp(i alpha (p_a e_b - e_a p_b)); its kernel -i d/dt log is what the solver adds
    # separably, alpha (e_a(t) e_b(t') - p_a(t) p_b(t')) at t - t' (central difference)
    d = tba.ttbar(0.3)
    t = np.array([-0.5, 0.2, 1.1])
    h = 1e-6
    kernel = (-1j * (np.log(d.value(FERMION, t + h)) - np.log(d.value(FERMION, t - h))) / (2 * h)).real
    np.testing.assert_allclose(kernel[0, 1], 0.3 * 0.5 * np.exp(t), rtol=1e-8)
    np.testing.assert_allclose(kernel[1, 0], 0.3 * 0.5 * np.exp(-t), rtol=1e-8)
    np.testing.assert_allclose(kernel[0, 0], 0.0, atol=1e-12)


def test_declarations_are_checked():
    with pytest.raises(ValueError, match="chirality"):
        tba.user_model(masses=[1.0, 1.0], blocks=[[{}, {}], [{}, {}]], chirality=["right", "up"])
    with pytest.raises(ValueError, match="multiplicity"):
        tba.user_model(masses=[1.0], blocks={}, multiplicity=[0])
    with pytest.raises(ValueError, match="spin 1"):
        tba.user_model(masses=[1.0, 1.0], blocks=[[{}, {}], [{}, {}]], chirality=["right", "left"],
                       charges={3: [1.0, 1.0]})
    with pytest.raises(ValueError, match="spin 3"):
        tba.solve_ground_state(FERMION, 1.0, tba.higher_spin(3, 0.01))
    with pytest.raises(ValueError, match="coupling n"):
        tba.massless_bosons(2.5)
    with pytest.raises(ValueError, match="scale"):
        tba.massless_fermion(scale=-1.0)


def test_central_charges_from_dilogarithms():
    # free fermion 1/2, n bosons n (Rogers' dilogarithm L(1/2) = pi^2/12, L(1) = pi^2/6), both in
    # the UV and the IR (mpmath, docs/physics.md section 9)
    for model, c in ((FERMION, 0.5), (BOSON, 1.0), (STRING, 24.0)):
        assert uv_central_charge(model) == pytest.approx(c, rel=1e-14)
        assert ir_central_charge(model) == pytest.approx(c, rel=1e-14)


@pytest.mark.parametrize("model, c", THEORIES)
@pytest.mark.parametrize("alpha", [-0.07, 0.0, 0.02])
def test_ground_state_against_the_closed_form(model, c, alpha):
    # E from the TBA against the closed form, both signs of alpha (c = 24: Arvis 1983), to 1e-12;
    # the error estimate bounds the difference
    start = None
    for R in (40.0, 6.0, 2.5):
        res = tba.solve_ground_state(model, R, tba.ttbar(alpha), start=start)
        assert res.converged, res.message
        start = res
        exact = closed_form(R, alpha, c).real
        assert abs(res.energy - exact) <= res.error <= 1e-12 * abs(exact), (R, res.energy, exact)


def test_scale_independence():
    # M is arbitrary for a free massless theory: rapidities shift by log M (docs/physics.md
    # section 9), so E(R) does not depend on it; the error estimates cover the differences
    for make, c in ((tba.massless_fermion, 0.5), (lambda M: tba.massless_bosons(24, M), 24.0)):
        energies = [tba.solve_ground_state(make(M), 1.7, tba.ttbar(0.01)) for M in (1.0, 1e-3, 37.0)]
        exact = closed_form(1.7, 0.01, c).real
        for res in energies:
            assert abs(res.energy - exact) <= res.error
        assert abs(energies[1].energy - energies[2].energy) <= energies[1].error + energies[2].error


@pytest.mark.parametrize("model, c", THEORIES)
def test_branch_radius(model, c):
    # R_c = sqrt(2 pi c alpha / 3), where the ground state's square root vanishes (docs/physics.md
    # section 4), from the undeformed curve; below it no real solution
    alpha = 0.1
    R_c = math.sqrt(2 * math.pi * c * alpha / 3)
    bp = tba.branch_point(model, alpha)
    assert abs(bp.radius - R_c) <= bp.radius_error <= 1e-12 * R_c
    below = tba.solve_ground_state(model, 0.99 * R_c, tba.ttbar(alpha))
    assert below.status is tba.Status.NO_REAL_SOLUTION, below.message


@pytest.mark.parametrize("model, c", THEORIES)
def test_fold_second_branch_and_complex_pair(model, c):
    # the fold of the TBA (pseudo-arclength) at R_c = sqrt(2 pi c alpha / 3); the complex pair
    # below it is the complex root of the closed form, the second branch above it the other real
    # root (docs/physics.md section 7; for c = 24 the Nambu-Goto spectrum, Arvis 1983)
    alpha = 0.1
    R_c = math.sqrt(2 * math.pi * c * alpha / 3)
    fold = tba.locate_fold(model, tba.ttbar(alpha), start=1.5 * R_c)
    assert abs(fold.value - R_c) <= fold.value_error <= 1e-12 * R_c
    pair = tba.complex_pair(fold, 0.9 * R_c)
    exact = closed_form(0.9 * R_c, alpha, c)
    assert exact.imag > 0 and abs(pair.energy - exact) <= pair.error <= 1e-12 * abs(exact)
    second = tba.second_branch(fold, 1.2 * R_c)
    R = 1.2 * R_c
    other = -(R / (2 * alpha)) * (math.sqrt(1 - 4 * alpha * math.pi * c / (6 * R * R)) + 1)
    assert abs(second.energy - other) <= second.error <= 1e-12 * abs(other)


def test_derivatives_flow_residual_and_thermodynamics():
    # closed form: E(R, alpha) solves alpha E^2 + R E + pi c / 6 = 0, so dE/dR = -E / (2 alpha E + R)
    # and dE/dalpha = -E^2 / (2 alpha E + R); the Burgers residual vanishes
    c, alpha, R = 24.0, 0.01, 3.0
    res = tba.solve_ground_state(STRING, R, tba.ttbar(alpha))
    E = closed_form(R, alpha, c).real
    d = tba.energy_derivatives(res)
    assert abs(d["dE_dR"] - (-E / (2 * alpha * E + R))) <= d["dE_dR_error"] <= 1e-10
    assert abs(d["dE_dalpha1"] - (-E * E / (2 * alpha * E + R))) <= d["dE_dalpha1_error"] <= 1e-8
    b = tba.flow_residual(res)
    assert abs(b["residual"]) <= b["error"] <= 1e-12 * b["scale"]
    # undeformed CFT thermodynamics: f = -pi c T^2 / 6, s = pi c T / 3, c_v = pi c T / 3 exactly
    # (the bulk term of a free massless theory is zero; docs/physics.md section 6)
    for p in tba.thermodynamics(BOSON, [0.5, 2.0]):
        T = p.temperature
        assert p.bulk_included
        assert abs(p.free_energy + math.pi * T * T / 6) <= p.free_energy_error + 1e-15
        assert abs(p.entropy - math.pi * T / 3) <= p.entropy_error + 1e-15
        assert abs(p.specific_heat - math.pi * T / 3) <= p.specific_heat_error + 1e-15


def test_multiplicity_counts_identical_species():
    # a species of multiplicity g is g identical copies: g free massive fermions have g times the
    # energy of one (free fermion: E_NS(R) = -(1/pi) sum (-1)^(k+1) K_1(kR)/k, Mussardo 2010)
    from scipy.special import k1

    three = tba.user_model(masses=[1.0], blocks={}, multiplicity=[3])
    res = tba.solve_ground_state(three, 0.8)
    exact = -3 * sum((-1) ** (k + 1) * k1(0.8 * k) / k for k in range(1, 200)) / math.pi
    assert abs(res.energy - exact) <= res.error <= 1e-12 * abs(exact)


def test_mixed_massive_and_massless_species():
    # a free massive Majorana fermion next to a massless one, no scattering but TTbar between all
    # of them (the massive-massless phase -(m M / 2) e^{-t}, docs/physics.md section 9.2):
    # undeformed E_0(R) = E_NS(R) - pi / (12 R) (the Bessel series, Mussardo 2010, and the CFT);
    # deformed, P = 0: E = E_0(R + alpha E), solved here with scipy's brentq
    from scipy.optimize import brentq
    from scipy.special import k1

    mixed = tba.user_model(masses=[1.0, 1.0, 1.0], blocks=[[{}] * 3] * 3,
                           chirality=["massive", "right", "left"])

    def E0(R):
        return -sum((-1) ** (k + 1) * k1(k * R) / k for k in range(1, 400)) / math.pi - math.pi / (12 * R)

    for R, alpha in ((2.0, 0.0), (2.0, 0.1), (1.2, -0.2)):
        res = tba.solve_ground_state(mixed, R, tba.ttbar(alpha))
        exact = brentq(lambda E: E - E0(R + alpha * E), -5.0, 0.0, xtol=1e-16, rtol=1e-15) if alpha \
            else E0(R)
        assert abs(res.energy - exact) <= res.error <= 1e-12 * abs(exact), (R, alpha)
