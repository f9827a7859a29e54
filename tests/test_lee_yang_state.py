"""The Lee-Yang zero-momentum one-particle state (tba/solvers/lee_yang.py) at every radius."""

import math

import pytest
from scipy.optimize import minimize_scalar

from tba import Status, higher_spin, lee_yang, solve_ground_state, ttbar
from tba.solvers.lee_yang import solve_lee_yang_one_particle

#: R* ~ 2.54: where the singular points meet at +-i pi/3 and the form of the state changes
PINCH = 2.54


def _above(res):
    """True when the singular points sit at +-i y (R > R*), False for +-x +- i pi/3."""
    return res._state["final"]["pair"].above


def test_mass_gap_and_mu_term():
    # E_1 - E_0 -> m at large R (docs/physics.md section 5), approached through the mu-term of the
    # bound-state pole of S at 2 pi i / 3: ~ e^{-m R sin(pi/3)} = e^{-sqrt(3) m R / 2}
    # (Luscher 1986; Klassen & Melzer 1991 - from memory)
    gaps = {}
    for R in (8.0, 10.0, 12.0):
        e1 = solve_lee_yang_one_particle(R)
        e0 = solve_ground_state(lee_yang(), R)
        assert e1.converged and e0.converged
        gaps[R] = e1.energy - e0.energy - 1.0
    assert abs(gaps[12.0]) < 1e-4
    for a, b in ((8.0, 10.0), (10.0, 12.0)):
        assert gaps[a] / gaps[b] == pytest.approx(math.exp(math.sqrt(3)), rel=0.15)


def test_uv_limit_is_the_identity_state():
    # UV: E_1 R -> 2 pi (0 - c/12), c = -22/5, i.e. 11 pi / 15 (docs/physics.md section 5), within
    # 1e-4 at R = 1e-3
    res = solve_lee_yang_one_particle(1e-3)
    assert res.converged, res.message
    assert not _above(res)
    assert abs(res.energy * 1e-3 - 11 * math.pi / 15) < 1e-4
    # Beyond the limit: the level is the conformal identity, so conformal perturbation theory
    # has no first-order term C_{1 Phi 1} lambda R^{12/5} and, after the bulk term -f R^2, the
    # remainder goes like R^{24/5}; the ground state (the field phi, C_{phi Phi phi} != 0) keeps
    # its R^{12/5} term (common practice, no source). Ratios between R = 0.3 and 0.1, where
    # the next orders change them by ~R^{12/5} ~ 5%.
    f = lee_yang().bulk_energy_density
    rest1, rest0 = {}, {}
    for R in (0.3, 0.1):
        e1 = solve_lee_yang_one_particle(R)
        e0 = solve_ground_state(lee_yang(), R)
        assert e1.converged and e0.converged
        rest1[R] = e1.energy * R - 11 * math.pi / 15 + f * R * R
        rest0[R] = e0.energy * R + math.pi / 15 + f * R * R
    assert rest1[0.3] / rest1[0.1] == pytest.approx(3 ** 4.8, rel=0.05)
    assert rest0[0.3] / rest0[0.1] == pytest.approx(3 ** 2.4, rel=0.05)


def test_level_is_analytic_through_the_pinch():
    # The level is analytic in R (common practice, no source). Equations that are right on
    # one side of R* only, or continued with the wrong branch, show a kink or a jump there: a
    # polynomial through points on both sides must predict the points next to R*.
    radii = [2.3 + 0.05 * k for k in range(11) if k != 5]
    results = [solve_lee_yang_one_particle(R) for R in radii]
    assert all(r.converged for r in results)
    assert _above(results[-1]) and not _above(results[0])
    import numpy as np
    coef = np.polyfit(np.array(radii) - 2.55, [r.energy for r in results], len(radii) - 1)
    for R in (2.55, 2.54, 2.535):
        res = solve_lee_yang_one_particle(R)
        assert res.converged, res.message
        assert abs(np.polyval(coef, R - 2.55) - res.energy) < 1e-10


@pytest.mark.parametrize("alpha", [-0.1, 0.1])
@pytest.mark.parametrize("R", [1.0, 4.0])
def test_deformed_follows_flow(alpha, R):
    # P = 0: E(R, alpha) = E(R + alpha E, 0) (docs/physics.md section 4), on both sides of R*
    res = solve_lee_yang_one_particle(R, ttbar(alpha))
    assert res.converged, res.message
    ref = solve_lee_yang_one_particle(R + alpha * res.energy)
    assert abs(res.energy - ref.energy) <= 1e-10 * res.energy
    assert abs(res.energy - ref.energy) <= res.error + ref.error


def test_branch_point_for_negative_alpha():
    # alpha < 0: R(R') = R' - alpha E_1(R') has a minimum R_c over the undeformed radius R'
    # (docs/physics.md section 4: the flow by characteristics); below R_c the level has no real
    # solution, above it does
    alpha = -0.1
    opt = minimize_scalar(lambda r: r - alpha * solve_lee_yang_one_particle(r).energy,
                          bracket=(0.3, 0.5, 0.8), tol=1e-8)
    r_c = opt.fun
    above = solve_lee_yang_one_particle(r_c * (1 + 1e-3), ttbar(alpha))
    below = solve_lee_yang_one_particle(r_c * (1 - 1e-3), ttbar(alpha))
    assert above.converged, above.message
    assert below.status is Status.NO_REAL_SOLUTION and math.isnan(below.energy)
    assert "branch point" in below.message


@pytest.mark.parametrize("R", [0.05, 1.0, 2.54, 6.0])
def test_error_estimate_bounds_the_error(R):
    # the estimate at tol 1e-8 against the same level at tol 1e-12 (common practice, no source)
    loose = solve_lee_yang_one_particle(R, tol=1e-8)
    tight = solve_lee_yang_one_particle(R, tol=1e-12)
    assert loose.converged and tight.converged
    assert loose.error <= 1e-8 * max(abs(loose.energy), 1.0)
    assert abs(loose.energy - tight.energy) <= loose.error + tight.error


def test_higher_spin_factors_are_refused():
    with pytest.raises(ValueError, match="deformation"):
        solve_lee_yang_one_particle(1.0, higher_spin(3, 0.01))
