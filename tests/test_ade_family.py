"""The ADE family and the tadpoles, generated from the Klassen-Melzer identity (tba/models/ade.py).

Independent checks: published mass spectra (closed forms), the identity itself at momenta the
generator never used, the exact S-matrix identities (unitarity, crossing, the Y-system form and
the bootstrap at every bound-state pole, signs included), published S-matrices (A_2, E8), the UV
central charges 2r/(h + 2) and 2n/(2n + 3) from the dilogarithm sum and from the solver at
R = 1e-5, and the bulk energy of the 3-state Potts model from a fit of R E(R).
"""

import math
from fractions import Fraction

import numpy as np
import pytest

from reference import bound_states

from tba import solve_ground_state, solve_radii
from tba.models import HalfBlock, free_fermion, get_model, lee_yang
from tba.models.ade import (a_incidence, ade_theory, coxeter_number, d_incidence, e_incidence,
                            tadpole_incidence)
from tba.models.blocks import key_transform
from tba.models.uv import uv_central_charge

FAMILY = ([f"A{n}" for n in range(1, 9)] + [f"D{n}" for n in range(4, 10)] + ["E6", "E7", "E8"]
          + [f"T{n}" for n in range(1, 6)])
UNITARY = [f"A{n}" for n in range(2, 8)] + [f"D{n}" for n in range(4, 9)] + ["E6", "E7", "E8"]
INCIDENCE = {"A": a_incidence, "D": d_incidence, "E": e_incidence, "T": tadpole_incidence}


def rank_and_coxeter(name):
    kind, n = name[0], int(name[1:])
    # Coxeter numbers (Bourbaki; T_n = A_2n folded): A_n n+1, D_n 2n-2, E 12/18/30, T_n 2n+1
    h = {"A": n + 1, "D": 2 * n - 2, "E": {6: 12, 7: 18, 8: 30}.get(n), "T": 2 * n + 1}[kind]
    return n, h


def c(x):
    return math.cos(math.pi * x)


def published_masses(name):
    """Mass spectra in closed form (lightest = 1), as sets with multiplicity."""
    kind, n = name[0], int(name[1:])
    _, h = rank_and_coxeter(name)
    s = lambda a: math.sin(math.pi * a / h)  # noqa: E731
    if kind in "AT":
        # A_n: m_a = sin(pi a / h) / sin(pi / h), a = 1..n (R. Koberle and J.A. Swieca, Phys.
        # Lett. B86 (1979) 209); T_n: the same with a = 1..n, h = 2n + 1 (A_2n folded; T.R.
        # Klassen and E. Melzer, Nucl. Phys. B338 (1990) 485)
        return sorted(s(a) / s(1) for a in range(1, n + 1))
    if kind == "D":
        # D_n: m_a = 2 m sin(a pi / h), a = 1..n-2, and two spinors of mass m (Braden, Corrigan,
        # Dorey and Sasaki, Nucl. Phys. B338 (1990) 689; Klassen and Melzer 1990)
        raw = [2 * s(a) for a in range(1, n - 1)] + [1.0, 1.0]
        return sorted(m / min(raw) for m in raw)
    if n == 6:
        # E6: 1, 1, sqrt 2, 2 cos(pi/12) twice, 4 cos(pi/4) cos(pi/12) (Braden et al. 1990)
        return sorted([1, 1, 2 * c(1 / 4), 2 * c(1 / 12), 2 * c(1 / 12), 4 * c(1 / 4) * c(1 / 12)])
    if n == 7:
        # E7 (V.A. Fateev and A.B. Zamolodchikov, Int. J. Mod. Phys. A5 (1990) 1025; P. Christe
        # and G. Mussardo, Nucl. Phys. B330 (1990) 465)
        return sorted([1, 2 * c(5 / 18), 2 * c(1 / 9), 2 * c(1 / 18), 4 * c(1 / 18) * c(5 / 18),
                       4 * c(2 / 9) * c(1 / 9), 4 * c(1 / 18) * c(1 / 9)])
    # E8 (A.B. Zamolodchikov, Int. J. Mod. Phys. A4 (1989) 4235)
    m2 = 2 * c(1 / 5)
    return sorted([1, m2, 2 * c(1 / 30), 2 * c(7 / 30) * m2, 2 * c(2 / 15) * m2, 2 * c(1 / 30) * m2,
                   4 * c(1 / 5) * c(7 / 30) * m2, 4 * c(1 / 5) * c(2 / 15) * m2])


@pytest.mark.parametrize("name", FAMILY)
def test_masses_and_coxeter_numbers(name):
    model = get_model(name)
    n, h = rank_and_coxeter(name)
    assert coxeter_number(INCIDENCE[name[0]](n)) == h
    assert model.n_species == n
    assert model.masses[0] == 1.0 and np.all(np.diff(model.masses) >= 0)
    np.testing.assert_allclose(model.masses, published_masses(name), rtol=0, atol=1e-12)


def phit(model, k):
    return np.array([[sum(m * key_transform(key, k) for key, m in cell.items()) for cell in row]
                     for row in model.blocks])


@pytest.mark.parametrize("name", FAMILY)
def test_identity_at_new_momenta(name):
    # (1 - phit/2pi)^(-1) = 1 - I / (2 cosh(pi k / h)) (Klassen and Melzer 1990), from the
    # stored blocks, f_x and half-blocks, at momenta the generator did not sample
    model = get_model(name)
    n, h = rank_and_coxeter(name)
    inc = np.array(ade_theory(INCIDENCE[name[0]](n)).incidence)
    for k in np.random.default_rng(7).uniform(-2.5, 2.5, size=4):
        lhs = np.linalg.inv(np.eye(n) - phit(model, k) / (2 * np.pi))
        np.testing.assert_allclose(lhs, np.eye(n) - inc / (2 * np.cosh(np.pi * k / h)), atol=1e-12)
    # the recovered incidence is the diagram's, relabelled (same degrees)
    assert sorted(inc.sum(axis=0)) == sorted(INCIDENCE[name[0]](n).sum(axis=0))


@pytest.mark.parametrize("name", FAMILY)
def test_unitarity_crossing_and_signs(name):
    # S_ab(t) S_ab(-t) = 1; crossing S_(a-bar)b(t) = S_ab(i pi - t) with the antiparticles;
    # S_aa(0) = -1 (every species a fermion in the TBA)
    model = get_model(name)
    t = np.array([0.3 + 0.2j, -1.1 + 0.05j, 2.2 - 0.3j])
    S = model.s_matrix(t)
    np.testing.assert_allclose(S * model.s_matrix(-t), 1, rtol=1e-12)
    crossed = model.s_matrix(1j * np.pi - t)
    conj = list(model.antiparticle)
    np.testing.assert_allclose(S[conj], crossed, rtol=1e-11)
    assert np.all(np.diag(model.sign) == -1)
    np.testing.assert_allclose(model.s_matrix(np.zeros(1))[..., 0].real, model.sign, atol=1e-14)


@pytest.mark.parametrize("name", FAMILY)
def test_y_system_identity_with_signs(name):
    # S_ab(t + i pi/h) S_ab(t - i pi/h) = prod_c S_cb(t)^(I_ac), exactly, signs included
    # (Klassen and Melzer 1990; F. Ravanini, R. Tateo and A. Valleriani, Int. J. Mod. Phys. A8
    # (1993) 1707): the Fourier identity is its logarithmic derivative
    model = get_model(name)
    n, h = rank_and_coxeter(name)
    inc = np.array(ade_theory(INCIDENCE[name[0]](n)).incidence)
    t = np.array([0.41, -1.3 + 0.07j])
    lhs = model.s_matrix(t + 1j * np.pi / h) * model.s_matrix(t - 1j * np.pi / h)
    S = model.s_matrix(t)
    rhs = np.ones_like(lhs)
    for a in range(n):
        for c_ in range(n):
            rhs[a] = rhs[a] * S[c_] ** inc[a, c_]
    np.testing.assert_allclose(lhs, rhs, rtol=1e-10)


def pole_orders(model):
    """pole_orders[a][b] = {y: order} of the poles of S_ab at t = i pi y, 0 < y < 1: f_x has
    poles at i pi x and i pi (1 - x), <x> at i pi x."""
    def cell_poles(cell):
        out = {}
        for key, m in cell.items():
            ys = [key.x] if isinstance(key, HalfBlock) else [key, 1 - key]
            for y in ys:
                out[y] = out.get(y, 0) + m
        return out
    return [[cell_poles(cell) for cell in row] for row in model.blocks]


@pytest.mark.parametrize("name", UNITARY)
def test_bootstrap_at_every_bound_state_pole(name):
    # every simple pole with positive residue is a bound state of the right mass and satisfies
    # the bootstrap with signs (tests/reference.py: bound_states). Wrong S(0) signs fail it:
    # flipping the sign of one E8 pair breaks 60 of the 119 fusions.
    model = get_model(name)
    fusions, unmatched = bound_states(model.masses, model.s_matrix, pole_orders(model))
    assert not unmatched
    assert len(fusions) >= model.n_species


def test_published_s_matrices_and_signs():
    # A_2, scaling 3-state Potts: S_11 = <2/3>, S_(1 1bar) = S_11(i pi - t) = -<1/3> (Koberle and
    # Swieca 1979; A.B. Zamolodchikov, Int. J. Mod. Phys. A3 (1988) 743)
    potts = get_model("A2")
    t = np.array([0.2 + 0.1j, 1.7])
    half = lambda x: np.sinh(t / 2 + 1j * np.pi * x / 2) / np.sinh(t / 2 - 1j * np.pi * x / 2)  # noqa: E731
    np.testing.assert_allclose(potts.s_matrix(t)[0, 0], half(2 / 3), rtol=1e-13)
    np.testing.assert_allclose(potts.s_matrix(t)[0, 1], -half(1 / 3), rtol=1e-13)
    assert potts.name == "potts-3" and potts.antiparticle == (1, 0) and potts.labels == ("1", "1bar")
    # E8: S_ab is the product of its f_x with no extra sign (Zamolodchikov 1989), so
    # S_ab(0) = (-1)^(number of blocks)
    e8 = get_model("E8")
    nblocks = np.array([[sum(cell.values()) for cell in row] for row in e8.blocks])
    assert np.array_equal(e8.sign, (-1.0) ** nblocks)


def test_antiparticles():
    # charge conjugation is the diagram automorphism -w_0 (standard Lie theory): A_n a <-> n+1-a,
    # D_odd the spinors, E6 its flip; D_even, E7, E8, T_n self-conjugate
    def pairs(name):
        conj = get_model(name).antiparticle
        return sum(1 for a, cc in enumerate(conj) if cc > a)
    assert [pairs(f"A{n}") for n in range(1, 8)] == [0, 1, 1, 2, 2, 3, 3]
    assert [pairs(f"D{n}") for n in range(4, 10)] == [0, 1, 0, 1, 0, 1]
    assert [pairs(x) for x in ("E6", "E7", "E8", "T1", "T3")] == [2, 0, 0, 0, 0]
    # half-blocks (unpaired <x>) occur exactly where particles are not self-conjugate
    for name in FAMILY:
        model = get_model(name)
        has_half = any(isinstance(k, HalfBlock) for row in model.blocks for cell in row for k in cell)
        assert has_half == (model.antiparticle != tuple(range(model.n_species))), name


def test_lee_yang_is_t1_and_the_free_fermion_is_a1():
    # Lee-Yang: S = f_(2/3) (Al.B. Zamolodchikov, Nucl. Phys. B342 (1990) 695); A_1: S = -1
    ly, t1 = lee_yang(), get_model("T1")
    assert t1.name == "lee-yang" and t1.blocks == ly.blocks == (({Fraction(1, 3): 1},),)
    assert np.array_equal(t1.masses, ly.masses)
    a1 = ade_theory([[0]])
    assert a1.masses == (1.0,) and dict(a1.blocks[0][0]) == {} and a1.sign == ((-1,),)
    ff = get_model("A1")
    assert ff.name == "free-fermion" and ff.blocks == free_fermion().blocks == (({},),)


@pytest.mark.parametrize("name", FAMILY)
def test_uv_central_charge_from_the_dilogarithm_sum(name):
    # c_eff = 2 r / (h + 2) for ADE, 2n / (2n + 3) for T_n (Klassen and Melzer 1990)
    n, h = rank_and_coxeter(name)
    expected = 2 * n / (2 * n + 3) if name[0] == "T" else 2 * n / (h + 2)
    assert uv_central_charge(get_model(name)) == pytest.approx(expected, rel=1e-13)


@pytest.mark.slow
def test_uv_central_charge_large_ranks():
    # the same at large ranks (generation and plateau equations only)
    for name, expected in [("A24", 48 / 27), ("D24", 1.0), ("T24", 48 / 51)]:
        assert uv_central_charge(get_model(name)) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("name", [n if n != "E8" else pytest.param(n, marks=pytest.mark.slow)
                                  for n in FAMILY if n != "A1"])
def test_uv_central_charge_from_the_solver(name):
    # -6 R E_0(R) / pi -> c_eff at R = 1e-5: the corrections (bulk term 6 f R^2 / pi ~ 1e-10 and
    # conformal perturbation theory in R^(2 - 4/(h+2)) >= R^1.3) are below 1e-9 there. A1 is
    # the free fermion (tests/test_free_fermion.py); E8 takes a few seconds at this radius.
    n, h = rank_and_coxeter(name)
    expected = 2 * n / (2 * n + 3) if name[0] == "T" else 2 * n / (h + 2)
    res = solve_ground_state(get_model(name), 1e-5)
    assert res.converged, res.message
    assert -6 * 1e-5 * res.energy / math.pi == pytest.approx(expected, abs=1e-8)


def test_potts_bulk_term_from_a_small_radius_fit():
    # R E_TBA(R) = -pi c/6 - f R^2 + sum_(k >= 2) a_k R^(6k/5): conformal perturbation theory in
    # the thermal coupling of dimension 2 - 4/5 (h_eps = 2/5; first order vanishes), from
    # memory; the R^2 coefficient is -f. f = -m^2 / (2 C_11) with phi_11 ~ -C_11 e^{-|t|}, C_11 = sqrt 3
    potts = get_model("potts-3")
    assert potts.bulk_energy_density == pytest.approx(-1 / (2 * math.sqrt(3)), rel=1e-14)
    radii = np.geomspace(0.02, 0.8, 36)
    results = solve_radii(potts, radii[::-1], tol=1e-13)[::-1]
    assert all(r.converged for r in results)
    y = np.array([r.radius * r.energy for r in results])
    powers = [0, 2] + [6 * k / 5 for k in range(2, 9)]
    A = np.stack([radii ** p for p in powers], 1)
    coef = np.linalg.lstsq(A, y, rcond=None)[0]
    assert np.max(np.abs(A @ coef - y)) <= 1e-12
    assert coef[0] == pytest.approx(-math.pi * 0.8 / 6, rel=1e-11)   # c = 4/5
    assert coef[1] == pytest.approx(-potts.bulk_energy_density, rel=1e-7)


def test_bulk_terms_are_consistent_across_pairs():
    # the tails C_ab of every kernel are proportional to m_a m_b (the pole of phit at k = i is
    # the Perron-Frobenius projector), so one bulk energy serves every pair; E8 keeps its value
    # -1 / (8 (sin(pi/3) + sin(2 pi/5) + sin(pi/15))) (V.A. Fateev, Phys. Lett. B324 (1994) 45,
    # from memory)
    for name in FAMILY[1:]:
        assert get_model(name).bulk_energy_density is not None, name
    e8 = get_model("E8").bulk_energy_density
    assert e8 == pytest.approx(-1 / (8 * (math.sin(math.pi / 3) + math.sin(2 * math.pi / 5)
                                          + math.sin(math.pi / 15))), rel=1e-14)
    assert get_model("A1").bulk_energy_density is None


def test_e8_model_is_the_generated_theory():
    # ising-e8 carries exactly what the generator gives (published checks in tests/test_ade.py:
    # Zamolodchikov's masses, S_11 and S_12); only S_ab(0) is new: +1 for a != b
    from tba.models.ade import E8_COXETER, E8_INCIDENCE, ade_scattering

    masses, blocks = ade_scattering(E8_INCIDENCE, E8_COXETER)
    e8 = get_model("ising-e8")
    assert e8.blocks == blocks and np.array_equal(e8.masses, masses)
    assert np.array_equal(e8.sign, 1 - 2 * np.eye(8))
