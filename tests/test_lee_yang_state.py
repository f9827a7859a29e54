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


def _mu_term_v(R):
    """v = -log(1/4 - sigma) of the state's large-R form: y = pi/6 + tau, tau = sqrt(3) e^(-sqrt(3) R / 2)."""
    tau = math.sqrt(3) * math.exp(-R * math.sqrt(3) / 2)
    return -math.log(math.sin(tau) * math.sin(math.pi / 3 - tau))


@pytest.mark.parametrize("R", [25.0, 30.0, 40.0, 60.0])
def test_near_singular_factors_against_mpmath(R):
    # S = f_(2/3), the scaling Lee-Yang S-matrix (J.L. Cardy and G. Mussardo, Phys. Lett. B225
    # (1989) 275), has a pole at 2c = 2 i y and a zero at c - i pi/2 = -i(pi/3 - tau) that the
    # level approaches as tau ~ e^(-sqrt(3) R / 2) -> 0, and Q(c + i pi/3) a double pole. The
    # plain expressions lost 3e-7 (R = 25) to 9e-6 (R = 30) relatively; here each factor and the
    # constant part of the quantisation function G against the unfactored expressions at 60
    # digits (mpmath), from the same v
    import mpmath
    from tba.solvers.lee_yang import Pair

    with mpmath.workdps(60):
        v = mpmath.mpf(_mu_term_v(R))
        pair = Pair(float(v))
        s = mpmath.sin(2 * mpmath.pi / 3)
        sigma = mpmath.mpf(1) / 4 - mpmath.exp(-v)
        zeta = -1j * mpmath.asin(mpmath.sqrt(sigma))
        c = 1j * mpmath.pi / 3 + zeta

        def S(u):
            return (mpmath.sinh(u) + 1j * s) / (mpmath.sinh(u) - 1j * s)

        def Q(u):
            return (mpmath.sinh(u) ** 2 + sigma) / mpmath.cosh(u) ** 2

        exact = [mpmath.log(abs(S(2 * c))), mpmath.log(abs(S(zeta - 1j * mpmath.pi / 6))),
                 mpmath.log(abs(Q(c + 1j * mpmath.pi / 3)))]
        ours = pair.singular_logs()
        for a, b in zip(ours, exact):
            # a difference of logarithms is the relative error of the factor itself
            assert abs(a - b) <= 1e-13, (R, a, b)
        r_eff = mpmath.mpf(R)
        G = (r_eff * mpmath.cosh(c) - mpmath.log(S(2 * c)) - mpmath.log(Q(c + 1j * mpmath.pi / 3)) / 2
             + mpmath.log(S(1j * mpmath.pi / 3 + 2 * zeta)) / 2
             - mpmath.log(8j * s * mpmath.tanh(zeta)) / 2 - mpmath.log(S(zeta - 1j * mpmath.pi / 6)))
        ours_G = pair.G_constant(R)
        assert abs(ours_G.real - G.real) <= 1e-13 * abs(G.real)
        assert math.remainder(ours_G.imag - float(G.imag), 2 * math.pi) == pytest.approx(0, abs=1e-12)
        tau = mpmath.pi / 6 - mpmath.asin(mpmath.sqrt(sigma))  # y - pi/6
        assert abs(pair.tau - tau) <= 1e-13 * tau


@pytest.mark.parametrize("R", [25.0, 30.0, 40.0, 60.0])
def test_large_radius_level_converges(R):
    # was not-converged from R ~ 25 on. E_1 - m is the mu-term of the bound-state pole of S at
    # 2 pi i / 3 with residue i Gamma^2, Gamma^2 = -4 sin(2 pi/3): delta m = -(sqrt 3 / 2) Gamma^2
    # e^(-sqrt(3) R / 2) = 3 e^(-sqrt(3) R / 2) (M. Luscher, Commun. Math. Phys. 104 (1986) 177,
    # from memory), up to the F-term ~ e^(-R) and mu-term squared ~ e^(-sqrt(3) R). With
    # e^(-R) <= 4e-18 at R >= 40 the closed form is a reference to rounding; at R = 25, 30
    # the reference is the level at a looser tolerance (coarser grids, common practice)
    res = solve_lee_yang_one_particle(R)
    assert res.status is Status.CONVERGED, res.message
    assert res.error <= 1e-12 * res.energy
    mu = 1.0 + 3.0 * math.exp(-math.sqrt(3) * R / 2)
    assert abs(res.energy - mu) <= 2 * math.exp(-R) + res.error
    if R >= 40:
        assert abs(res.energy - mu) <= res.error
    loose = solve_lee_yang_one_particle(R, tol=1e-8)
    assert loose.converged, loose.message
    assert abs(loose.energy - res.energy) <= loose.error + res.error


def test_level_converges_up_to_the_largest_radius():
    for R in (200.0, 700.0):
        res = solve_lee_yang_one_particle(R)
        assert res.status is Status.CONVERGED, (R, res.message)
        assert abs(res.energy - 1.0) <= res.error  # E_1 - m = 3 e^(-sqrt(3) R / 2) < 1e-70


def test_a_scan_refines_each_point_from_the_previous_one(monkeypatch):
    # along a scan the previous point's level is refined at the next radius directly (two grid
    # solves) before the continuation in R; both paths must give the same statuses (below the
    # branch radius at alpha = -0.1: no real solution) and energies within the summed error
    # estimates (common practice for a change of path, no source), the direct one in fewer
    # grid solves
    import numpy as np

    import tba.solvers.lee_yang as ly

    radii = np.geomspace(4.0, 0.3, 14)
    solves, solve, two_grids = [0], ly._solve, ly._two_grids

    def counted(*args):
        solves[0] += 1
        return solve(*args)

    def no_direct(base, radius, alpha, tol, seed, undeformed, iterations, det_sign=None):
        if det_sign is not None:  # the direct attempt: not made
            return ly.SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations)
        return two_grids(base, radius, alpha, tol, seed, undeformed, iterations)

    def scans():
        out = []
        for alpha in (0.0, 0.1, -0.1):
            start = None
            for R in radii:
                res = solve_lee_yang_one_particle(R, ttbar(alpha) if alpha else None, start=start)
                start = res if res.converged else start
                out.append(res)
        return out

    monkeypatch.setattr(ly, "_solve", counted)
    direct, n_direct = scans(), solves[0]
    monkeypatch.setattr(ly, "_two_grids", no_direct)
    solves[0] = 0
    followed, n_followed = scans(), solves[0]
    assert sum(r.status is Status.NO_REAL_SOLUTION for r in direct) >= 3
    for a, b in zip(direct, followed, strict=True):
        assert a.status is b.status, (a.radius, a.message, b.message)
        if a.converged:
            assert abs(a.energy - b.energy) <= a.error + b.error, a.radius
    assert n_direct < 0.85 * n_followed  # measured: 267 against 352
