"""Higher-spin CDD factors of several-species models: charges, allowed spins, the generalised flow.

The charges q_s are eigenvectors of the incidence matrix (tba/models/charges.py); checked here
against the bootstrap (a conserved charge is additive at every fusion vertex, with the fusion
angles: Braden, Corrigan, Dorey and Sasaki, Nucl. Phys. B338 (1990) 689) and the known spins of
E8 (A.B. Zamolodchikov, Int. J. Mod. Phys. A4 (1989) 4235) and of the tadpole T_1 = Lee-Yang
(J.L. Cardy and G. Mussardo, Phys. Lett. B225 (1989) 275: spins 1, 5, 7, 11, ..., from memory).

The generalised flow (derived in tba/models/cdd.py): for the ground state,
d E / d alpha_s = s E_s dE_s/dR with E_s = -(1/2 pi) sum_a q_s^a int cosh(s t) L_a dt. Checked for
the 3-state Potts model (A_2; its spin-5 charges have one sign, so finite alpha_5 < 0 has a real
ground state) and for E8 spins 7 and 11 (mixed signs: only alpha_s = 0 is meaningful) against
the exact derivative of the solver (tba.solvers.ground.energy_derivatives), finite differences of
solved energies, and slow dense solves with the explicit kernel matrix (tests/reference.py).
"""

import math

import numpy as np
import pytest
from reference import bound_states, dense_spin_response, dense_tba_energy

from tba import solve_ground_state
from tba.models import get_model, lee_yang
from tba.models.cdd import higher_spin
from tba.solvers.ground import energy_derivatives


def test_spins_of_the_exceptional_theories():
    # E8: the integrals of motion have spins coprime to 30 (Zamolodchikov 1989); E7 and E6: the
    # exponents 1, 5, 7, 9, 11, 13, 17 (mod 18) and 1, 4, 5, 7, 8, 11 (mod 12) (Lie theory)
    e8 = get_model("E8").charge_rule
    assert e8.modulus == 30 and e8.residues == tuple(s for s in range(1, 30) if math.gcd(s, 30) == 1)
    assert get_model("E7").charge_rule.residues == (1, 5, 7, 9, 11, 13, 17)
    assert get_model("E6").charge_rule.residues == (1, 4, 5, 7, 8, 11)
    assert get_model("A4").charge_rule.residues == (1, 2, 3, 4)
    # one species: every odd spin, q = 1 (crossing of one self-conjugate species); Lee-Yang too,
    # although its conserved charges, those of the spectral rule of T_1, have the spins 1, 5
    # (mod 6) (Cardy and Mussardo 1989): the other odd spins are CDD factors its bootstrap lacks
    assert lee_yang().charge_rule.describe() == get_model("sinh-gordon", 0.6).charge_rule.describe() == "odd s"
    from tba.models.ade import ade_theory, tadpole_incidence
    assert ade_theory(tadpole_incidence(1)).charge_rule.describe() == "s = 1, 5 (mod 6)"
    for s in (31, 37, 59):
        get_model("E8").charges(s)  # the residues repeat with the period h
    with pytest.raises(ValueError, match=r"spin 3: ising-e8 has no spin-3 charge; allowed spins are "
                                         r"s = 1, 7, 11, 13, 17, 19, 23, 29 \(mod 30\)"):
        get_model("E8").charges(3)
    with pytest.raises(ValueError, match="spin 2: lee-yang has no spin-2 charge; allowed spins are odd s"):
        lee_yang().charges(2)
    # D_even: the exponent n - 1 is doubled (two independent charges): refused, and said so
    with pytest.raises(ValueError, match="two independent spin-3 charges"):
        get_model("D4").charges(3)
    assert get_model("D5").charges(4).tolist() == pytest.approx([0, 1, -1, 0, 0], abs=1e-12)


def _fusions(model):
    from test_ade_family import pole_orders

    fusions, unmatched = bound_states(model.masses, model.s_matrix, pole_orders(model))
    assert not unmatched
    return fusions


@pytest.mark.parametrize("name, spins", [("E8", [1, 7, 11, 13, 29, 31]), ("E7", [5, 9]),
                                         ("E6", [4, 5]), ("A4", [2, 3]), ("D5", [3, 4]),
                                         ("D6", [3, 7])])
def test_charges_are_conserved_at_every_fusion(name, spins):
    # q_s^c = q_s^a e^{i s alpha} + q_s^b e^{-i s beta} (Braden et al. 1990)
    model = get_model(name)
    fusions = _fusions(model)
    assert len(fusions) >= model.n_species
    for s in spins:
        q = model.charges(s)
        assert q[np.flatnonzero(q)[0]] == 1.0  # normalisation: 1 on the first species carrying it
        for a, b, c, alpha, beta in fusions:
            assert q[a] * np.exp(1j * s * alpha) + q[b] * np.exp(-1j * s * beta) == pytest.approx(q[c], abs=1e-11)
    np.testing.assert_array_equal(model.charges(1), model.masses)


def test_deformed_s_matrices_keep_the_bootstrap():
    # hence S_ab exp(i alpha q^a q^b sinh(s t)) satisfies the same bootstrap (E8, spin 7)
    model = get_model("E8")
    d = higher_spin(7, 0.02) + higher_spin(11, -0.01)
    t = np.array([0.2, -0.6 + 0.03j])
    full = lambda z: model.s_matrix(z) * d.value(model, z)  # noqa: E731
    for a, b, c, alpha, beta in _fusions(model)[:20]:
        np.testing.assert_allclose(full(t)[c], full(t + 1j * alpha)[a] * full(t - 1j * beta)[b], rtol=1e-9)


# --------------------------------------------------------------------------------------
# the generalised flow
# --------------------------------------------------------------------------------------

def charge_expectation(result, model, spin):
    """E_s = -(1/2pi) sum_a q_s^a int cosh(s t) L_a dt on the solver's grid (trapezoid rule)."""
    t = result.rapidity_grid
    L = np.logaddexp(0.0, -result.pseudo_energies)
    return -((t[1] - t[0]) / (2 * np.pi)) * float(model.charges(spin) @ L @ np.cosh(spin * t))


def d_dR(f, R, h):
    """Fourth-order central difference."""
    return (f(R - 2 * h) - 8 * f(R - h) + 8 * f(R + h) - f(R + 2 * h)) / (12 * h)


def deformed_kernel(model, couplings):
    """phi_ab(t) + sum_s alpha_s s q_s^a q_s^b cosh(s t): the full kernel, for the dense solve."""
    def kernel(t):
        out = model.kernel(t)
        for s, a in couplings.items():
            q = model.charges(s)
            out = out + a * s * np.multiply.outer(np.outer(q, q), np.cosh(s * t))
        return out
    return kernel


@pytest.fixture(scope="module")
def potts_flow():
    """3-state Potts (A_2) at R = 1 with alpha_5 = -2e-9 (a 0.8% change of E)."""
    model = get_model("potts-3")
    alpha = -2e-9
    d = higher_spin(5, alpha)
    res = solve_ground_state(model, 1.0, d, tol=1e-13)
    assert res.converged, res.message
    return model, alpha, d, res


def test_potts_spin_5_generalised_flow(potts_flow):
    # dE/dalpha_5 = 5 E_5 dE_5/dR at finite alpha_5 (tba/models/cdd.py), the exact derivative of
    # the solver against the relation, with E_5 from the solved pseudo-energies and dE_5/dR by
    # a fourth-order difference in R at fixed alpha_5
    model, alpha, d, res = potts_flow
    exact = energy_derivatives(res, spins=(5,))
    E5 = lambda R: charge_expectation(solve_ground_state(model, R, d, tol=1e-13), model, 5)  # noqa: E731
    relation = 5 * E5(1.0) * d_dR(E5, 1.0, 2e-3)
    assert abs(res.energy - solve_ground_state(model, 1.0).energy) > 3e-3 * abs(res.energy)
    assert exact["dE_dalpha5"] == pytest.approx(relation, rel=1e-8)
    # finite differences of solved energies in alpha_5
    step = 2e-11
    E = lambda a: solve_ground_state(model, 1.0, higher_spin(5, a), tol=1e-13).energy  # noqa: E731
    fd = (E(alpha - 2 * step) - 8 * E(alpha - step) + 8 * E(alpha + step) - E(alpha + 2 * step)) / (12 * step)
    assert exact["dE_dalpha5"] == pytest.approx(fd, rel=1e-7)


@pytest.mark.slow
def test_potts_spin_5_against_the_dense_solve(potts_flow):
    # the dense solve with the explicit deformed kernel (tests/reference.py), its energy and a
    # fourth-order difference of its energies in alpha_5
    model, alpha, d, res = potts_flow
    dense = lambda a: dense_tba_energy(model.masses, deformed_kernel(model, {5: a}), 1.0, h=0.05)  # noqa: E731
    assert res.energy == pytest.approx(dense(alpha), rel=1e-12)
    step = 2e-11
    fd = (dense(alpha - 2 * step) - 8 * dense(alpha - step) + 8 * dense(alpha + step)
          - dense(alpha + 2 * step)) / (12 * step)
    assert energy_derivatives(res, spins=(5,))["dE_dalpha5"] == pytest.approx(fd, rel=1e-7)


def test_even_spin_leaves_the_ground_state_alone():
    # A_2 spin 2: q_2 = (1, -1) is odd under conjugation while L_1 = L_1bar, so E_2 = 0 and the
    # ground state does not move (dE/dalpha_2 = 2 E_2 dE_2/dR = 0). Modes odd under conjugation
    # soften at alpha_2 ~ -2e-5 and 4.5e-5 (R = 1), which the solver reads as folds although the
    # symmetric solution goes on: only |alpha_2| below that is checked here.
    model = get_model("potts-3")
    assert model.charges(2).tolist() == pytest.approx([1.0, -1.0])
    res0 = solve_ground_state(model, 1.0, tol=1e-13)
    d = energy_derivatives(res0, spins=(2,))
    assert abs(d["dE_dalpha2"]) <= 1e-12 * abs(energy_derivatives(res0, spins=(5,))["dE_dalpha5"])
    for alpha in (-1e-5, 1e-5):
        res = solve_ground_state(model, 1.0, higher_spin(2, alpha), tol=1e-13)
        assert res.converged and res.energy == pytest.approx(res0.energy, rel=1e-13)


def test_a4_spin_3_flow_relation_at_zero_coupling():
    # A_4 (the Z_5 S-matrix of Koberle and Swieca 1979) spin 3: q_3^a = sin(3 pi a / 5) (the exponents
    # 1..n; Braden et al. 1990) has mixed signs, so as for E8 the check is at alpha_3 = 0:
    # dE/dalpha_3 = 3 E_3 dE_3/dR (tba/models/cdd.py), the solver's exact derivative against the
    # relation with E_3 from the solved pseudo-energies and dE_3/dR by a fourth-order difference,
    # and against central differences of solved energies at a coupling small enough (a relative
    # change of E of 1e-8) that the unbounded part of the driving term stays off the grid
    model = get_model("A4")
    q = model.charges(3)  # species ordered by mass: a = 1, 4 (m = 1), then 2, 3
    assert np.allclose(np.sort(q / q[0]), np.sort([math.sin(3 * math.pi * a / 5)
                                                   / math.sin(3 * math.pi / 5) for a in range(1, 5)]))
    res = solve_ground_state(model, 1.0, tol=1e-13)
    assert res.converged
    exact = energy_derivatives(res, spins=(3,))["dE_dalpha3"]
    E3 = lambda R: charge_expectation(solve_ground_state(model, R, tol=1e-13), model, 3)  # noqa: E731
    assert exact == pytest.approx(3 * E3(1.0) * d_dR(E3, 1.0, 2e-3), rel=1e-7)
    step = 1e-8 * abs(res.energy / exact)
    plus = solve_ground_state(model, 1.0, higher_spin(3, step), tol=1e-13)
    minus = solve_ground_state(model, 1.0, higher_spin(3, -step), tol=1e-13)
    assert plus.converged and minus.converged
    assert (plus.energy - minus.energy) / (2 * step) == pytest.approx(exact, rel=2e-5)


@pytest.fixture(scope="module")
def e8_at_zero():
    model = get_model("E8")
    res = solve_ground_state(model, 1.0, tol=1e-13)
    assert res.converged
    return model, res, energy_derivatives(res, spins=(7, 11))


@pytest.mark.parametrize("spin, rel", [(7, 1e-7), (11, 1e-5)])
def test_e8_flow_relation_at_zero_coupling(e8_at_zero, spin, rel):
    # d E / d alpha_s = s E_s dE_s/dR at alpha_s = 0 (the charges have mixed signs: finite alpha_s
    # has no real ground state, below). The spin-11 integrals weigh cosh(11 t) and feel the
    # grid's cutoff (chosen for the energy): E_11 from the solver's grid is good to ~1e-6.
    model, res, d = e8_at_zero
    Es = lambda R: charge_expectation(solve_ground_state(model, R, tol=1e-13), model, spin)  # noqa: E731
    assert d[f"dE_dalpha{spin}"] == pytest.approx(spin * Es(1.0) * d_dR(Es, 1.0, 2e-3), rel=rel)


@pytest.mark.parametrize("spin, change, rel", [(7, 1e-8, 2e-5), (11, 1e-10, 2e-3)])
def test_e8_exact_derivative_against_finite_differences(e8_at_zero, spin, change, rel):
    # central differences of solved energies at couplings small enough (a relative change of E
    # of ``change``) that the part of the driving term that is unbounded below stays outside the
    # grid; the difference then resolves the derivative to about 1e-13 / change
    model, res, d = e8_at_zero
    exact = d[f"dE_dalpha{spin}"]
    step = change * abs(res.energy / exact)
    plus = solve_ground_state(model, 1.0, higher_spin(spin, step), tol=1e-13)
    minus = solve_ground_state(model, 1.0, higher_spin(spin, -step), tol=1e-13)
    assert plus.converged and minus.converged
    assert (plus.energy - minus.energy) / (2 * step) == pytest.approx(exact, rel=rel)


@pytest.fixture(scope="module")
def e8_dense():
    """{spin: (E, E_s, dE/dalpha_s)} from the dense linear response (tests/reference.py)."""
    model = get_model("E8")
    return {s: dense_spin_response(model.masses, model.kernel, model.charges(s), s, 1.0, h=0.03,
                                   x_max=56.0) for s in (7, 11)}


@pytest.mark.slow
def test_e8_spin_7_against_the_dense_solve(e8_at_zero, e8_dense):
    model, res, d = e8_at_zero
    E, E7, dE7 = e8_dense[7]
    assert res.energy == pytest.approx(E, rel=1e-11)
    assert charge_expectation(res, model, 7) == pytest.approx(E7, rel=1e-9)
    assert d["dE_dalpha7"] == pytest.approx(dE7, rel=1e-9)
    assert abs(d["dE_dalpha7"] - dE7) <= d["dE_dalpha7_error"] + 1e-9 * abs(dE7)


@pytest.mark.slow
def test_e8_spin_11_against_the_dense_solve(e8_at_zero, e8_dense):
    model, res, d = e8_at_zero
    assert d["dE_dalpha11"] == pytest.approx(e8_dense[11][2], rel=1e-5)


@pytest.mark.slow
def test_e8_spin_11_error_estimate_bounds_the_error(e8_at_zero, e8_dense):
    # the exact spin-11 response against the independent dense solve: its two-grid error
    # estimate must bound the difference (band-limited kernel weights, tba/solvers/operators.py)
    model, res, d = e8_at_zero
    assert abs(d["dE_dalpha11"] - e8_dense[11][2]) <= d["dE_dalpha11_error"]


def test_e8_finite_spin_7_has_no_real_ground_state():
    # q_7 has both signs, so for either sign of alpha_7 some species has the driving term
    # 7 alpha_7 E_7 q_7^a cosh(7 t) < 0 growing faster than m_a R cosh t: no real solution; the
    # solver must not return a number
    model = get_model("E8")
    q = model.charges(7)
    assert q.min() < 0 < q.max()
    for alpha in (1e-4, -1e-4):
        res = solve_ground_state(model, 1.0, higher_spin(7, alpha))
        assert not res.converged and math.isnan(res.energy)
