"""Excited levels of the TTbar-deformed free massless theories (tba.solvers.massless) against the
closed form of deformed conformal levels, with their degeneracies.

Closed form (docs/physics.md sections 4 and 9): E = (R / 2 alpha)(sqrt(1 + 4 alpha E0 / R +
4 alpha^2 P^2 / R^2) - 1), E0 = 2 pi (D + Dbar - c/12) / R, P = 2 pi (D - Dbar) / R, integrating
the Burgers equation with the P^2 / R term (Smirnov and Zamolodchikov, Nucl. Phys. B915 (2017) 363,
from memory); c = 24 is the Nambu-Goto string in D = 26 (Arvis, Phys. Lett. B127 (1983) 106, from
memory). Degeneracies: the characters of free fields, prod (1 - q^n)^(-n_b) for n_b bosons
(coefficients 1, 24, 324, 3200, 25650 for 24: the level counting of the bosonic string,
J. Polchinski, String Theory vol. 1 (1998), from memory) and prod (1 + q^(n - 1/2)) for the
Neveu-Schwarz fermion, expanded here with sympy.
"""

import math
import re
from fractions import Fraction

import numpy as np
import pytest
import sympy

import tba
from tba.physics.flow import ExcitedCurve

FERMION = tba.massless_fermion()
BOSON = tba.massless_bosons(1)
STRING = tba.massless_bosons(24)


def closed_form(R, alpha, c, D, Dbar):
    """Real root, or None past the branch point; no cancellation at small alpha."""
    E0 = 2 * math.pi * (D + Dbar - c / 12) / R
    P = 2 * math.pi * (D - Dbar) / R
    x = 4 * alpha * E0 / R + 4 * alpha ** 2 * P ** 2 / R ** 2
    return None if 1 + x < 0 else (2 * E0 + 2 * alpha * P * P / R) / (math.sqrt(1 + x) + 1)


def fold_scale(R, alpha, c, D, Dbar):
    """The smallest lambda in (0, 1] where 1 + 4 lambda alpha E0 / R + 4 lambda^2 alpha^2 P^2 / R^2
    vanishes (the branch point met when alpha is switched on at fixed R), or None."""
    E0 = 2 * math.pi * (D + Dbar - c / 12) / R
    P = 2 * math.pi * (D - Dbar) / R
    roots = [r.real for r in np.roots([4 * alpha ** 2 * P ** 2 / R ** 2, 4 * alpha * E0 / R, 1.0])
             if abs(r.imag) < 1e-12 and 0 < r.real <= 1]
    return min(roots, default=None)


# (model, c, state, D, Dbar): bosons' levels are sums of the modes of each chirality; the
# fermion's Neveu-Schwarz levels (even number of particles) sums of half-odd modes, its Ramond
# levels (odd number) 1/16 + sums of integer modes
LEVELS = [
    (BOSON, 1, "1", 1, 0), (BOSON, 1, "-1,1", 1, 1), (BOSON, 1, "2", 2, 0), (BOSON, 1, "1,1", 2, 0),
    (BOSON, 1, "-3,-1,2", 2, 4),
    (STRING, 24, "1", 1, 0), (STRING, 24, "-1,1", 1, 1), (STRING, 24, "-1,1,1", 2, 1),
    (STRING, 24, "-2,-2,3", 3, 4),
    (FERMION, 0.5, "-1/2,1/2", Fraction(1, 2), Fraction(1, 2)),
    (FERMION, 0.5, "1/2,3/2", 2, 0), (FERMION, 0.5, "-1/2,3/2", Fraction(3, 2), Fraction(1, 2)),
    (FERMION, 0.5, "1", Fraction(17, 16), Fraction(1, 16)),
    (FERMION, 0.5, "-2,-1,3", Fraction(49, 16), Fraction(49, 16)),
]


@pytest.mark.parametrize("model, c, state, D, Dbar", [
    pytest.param(*row, id=f"{row[0].name}-{row[1]}-{row[2]}") for row in LEVELS])
@pytest.mark.parametrize("alpha", [-0.05, 0.0, 0.05])
def test_levels_against_the_closed_form(model, c, state, D, Dbar, alpha):
    # every level against the closed form to 1e-12 relative to max(|E|, 1/R); past its branch
    # point no real solution, at the coupling scale where the square root vanishes
    R = 1.3
    res = tba.solve(model, R, tba.ttbar(alpha), state=state)
    exact = closed_form(R, alpha, c, float(D), float(Dbar))
    if exact is None:
        assert res.status is tba.Status.NO_REAL_SOLUTION, res.message
        found = float(re.search(r"at ([0-9.e+-]+) times", res.message).group(1))
        assert found == pytest.approx(fold_scale(R, alpha, c, float(D), float(Dbar)), rel=1e-8)
        return
    assert res.converged, res.message
    assert abs(res.energy - exact) <= res.error <= 1e-12 * max(abs(exact), 1 / R)
    assert res.momentum == pytest.approx(2 * math.pi * float(D - Dbar) / R, rel=1e-13, abs=1e-13)
    if alpha == 0:  # (M/2) e^{+-t_k} R = 2 pi |I_k|: the free quantisation, exactly
        I = np.array([float(Fraction(n)) for n in state.split(",")])
        np.testing.assert_allclose(np.sign(I) * np.log(4 * np.pi * np.abs(I) / R), res.rapidities,
                                   rtol=1e-13, atol=1e-13)


def test_string_levels_for_negative_alpha_end_at_their_branch_points():
    # alpha < 0: only finitely many levels are real at a given R (the discriminant of the closed
    # form turns negative from some D + Dbar on); the solver finds the same ones
    R, alpha = 2.0, -0.05  # real while 1 - (pi / 5)(D + Dbar - 2) >= 0
    real = []
    for level in tba.free_levels(STRING, 4):
        if level.D != level.Dbar:
            continue
        res = tba.solve(STRING, R, tba.ttbar(alpha), state=level.states[0])
        real.append(res.converged)
        assert res.converged == (closed_form(R, alpha, 24, float(level.D), float(level.Dbar)) is not None)
    assert real == [True, True, True, False, False]


def _coefficients(product, top):
    """{D: coefficient of q^D} of a product in x = q^(1/2), D <= top (sympy's series)."""
    x = sympy.Symbol("x")
    poly = sympy.Poly(sympy.series(product(x), x, 0, 2 * top + 1).removeO(), x)
    return {Fraction(k, 2): int(poly.coeff_monomial(x ** k)) for k in range(2 * top + 1)}


def test_degeneracies_are_the_characters():
    top = 4
    for model, n in ((BOSON, 1), (STRING, 24)):
        # prod_m (1 - q^m)^(-n) for each chirality: deg(D, Dbar) = p_n(D) p_n(Dbar)
        p = _coefficients(lambda x: sympy.prod([(1 - x ** (2 * m)) ** (-n) for m in range(1, top + 1)]), top)
        expected = {(a, b): p[a] * p[b] for a in p for b in p if p[a] and p[b]}
        assert {(lv.D, lv.Dbar): lv.degeneracy for lv in tba.free_levels(model, top)} == expected
    assert [lv.degeneracy for lv in tba.free_levels(STRING, 4) if lv.Dbar == 0] == [1, 24, 324, 3200, 25650]
    # Neveu-Schwarz fermion, even fermion number: (chi+ chi+bar + chi- chi-bar) / 2 with
    # chi+- = prod (1 +- q^(m - 1/2)); Ramond, odd number: (rho+ rho+bar - rho- rho-bar) / 2 with
    # rho+- = prod (1 +- q^m), D = 1/16 + ... (the zero mode left out)
    chi = {s: _coefficients(lambda x: sympy.prod([1 + s * x ** (2 * m - 1) for m in range(1, 2 * top + 1)]), top)
           for s in (1, -1)}
    rho = {s: _coefficients(lambda x: sympy.prod([1 + s * x ** (2 * m) for m in range(1, top + 1)]), top)
           for s in (1, -1)}
    expected = {}
    for a in chi[1]:
        for b in chi[1]:
            ns = (chi[1][a] * chi[1][b] + chi[-1][a] * chi[-1][b]) // 2
            ramond = (rho[1][a] * rho[1][b] - rho[-1][a] * rho[-1][b]) // 2
            if ns:
                expected[(a, b)] = ns
            shifted = (a + Fraction(1, 16), b + Fraction(1, 16))
            if ramond and max(shifted) <= top:
                expected[shifted] = ramond
    assert {(lv.D, lv.Dbar): lv.degeneracy for lv in tba.free_levels(FERMION, top)} == expected


def test_the_states_of_a_level_are_degenerate():
    # "2" and "1,1" are the two states of (D, Dbar) = (2, 0) of one boson; all the states of a level
    # have the energy of the closed form (TTbar depends on E and P only)
    R, alpha = 1.9, 0.03
    for level in tba.free_levels(BOSON, 3):
        if level.D + level.Dbar != 3 or level.D == 0:
            continue
        exact = closed_form(R, alpha, 1, float(level.D), float(level.Dbar))
        for state in level.states:
            res = tba.solve(BOSON, R, tba.ttbar(alpha), state=state)
            assert abs(res.energy - exact) <= res.error, state


def test_moving_level_follows_the_flow_from_its_undeformed_curve():
    # the Burgers equation with P^2/R by characteristics, from the solver's own undeformed level
    # (tba.predict, docs/physics.md section 4), against the deformed solve: state "1", P = 2 pi / R
    R, alpha = 1.5, -0.08
    res = tba.solve(STRING, R, tba.ttbar(alpha), state="1")
    pred = tba.predict(ExcitedCurve(STRING, "1"), R, alpha, k=1)
    assert abs(res.energy - pred.energy) <= res.error + pred.error
    assert abs(res.energy - closed_form(R, alpha, 24, 1, 0)) <= res.error


def test_warm_starts_along_radii_agree_with_cold_solves():
    start = None
    for R in (3.0, 2.6, 2.2):
        warm = tba.solve(BOSON, R, tba.ttbar(-0.03), state="-1,2", start=start)
        cold = tba.solve(BOSON, R, tba.ttbar(-0.03), state="-1,2")
        assert warm.converged and cold.converged
        assert abs(warm.energy - cold.energy) <= warm.error + cold.error
        start = warm


@pytest.mark.parametrize("model, state, match", [
    (BOSON, "0", "non-zero"),
    (BOSON, "1/2,-1/2", "integer"),
    (FERMION, "1,1", "half-odd"),
    (FERMION, "1/2,1/2", "distinct"),
    (tba.tricritical_to_ising(), "-1/2,1/2", "interacting"),
])
def test_states_a_model_lacks_are_refused(model, state, match):
    with pytest.raises(ValueError, match=match):
        tba.solve(model, 1.0, state=state)


def test_only_the_ttbar_factor():
    with pytest.raises(ValueError, match="TTbar"):
        tba.solve(BOSON, 1.0, tba.higher_spin(3, 0.1), state="1")
    with pytest.raises(ValueError, match="TTbar"):
        tba.solve(BOSON, 1.0, tba.resonance(5.0, -1), state="1")
