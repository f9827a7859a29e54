"""Excited states with real rapidities: free fermion (exact), sinh-Gordon, deformations."""

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy.special import k1, kvp

from tba import Status, free_fermion, lee_yang, sinh_gordon, ttbar, user_model
from tba.solvers.excited import bethe_yang_energy, parse_state, solve_excited
from tba.physics.flow import ExcitedCurve, level_branch_point, predict

FF = free_fermion()
SG = sinh_gordon(0.6)


def free_fermion_level(state):
    """Exact free-fermion level (textbook, e.g. Mussardo, Statistical Field Theory (2010)):
    E = E_sector(R) + sum_j cosh t_j with R sinh t_j = 2 pi n_j; NS sector (half-odd n_j) for an
    even particle number, R sector (integer n_j) for an odd one (docs/physics.md section 2), with
    E_NS = -(1/pi) sum (-1)^(k+1) K_1(kR)/k, E_R = +(1/pi) sum K_1(kR)/k (scipy.special.k1).
    Returns (R -> (E, dE/dR, 0), momentum quantum number)."""
    n = np.array([float(Fraction(x)) for x in state])
    ns = len(n) % 2 == 0

    def level(R):
        k = np.arange(1, int(60 / R) + 50)
        signs = (-1.0) ** (k + 1) if ns else -np.ones(k.size)
        E = -math.fsum(signs * k1(k * R) / k) / math.pi
        dE = -math.fsum(signs * kvp(1, k * R)) / math.pi
        p = 2 * math.pi * n / R
        E += float(np.sum(np.sqrt(1 + p * p)))
        dE += float(np.sum(-p * p / R / np.sqrt(1 + p * p)))
        return E, dE, 0.0

    return level, float(np.sum(n))


FF_STATES = [("1/2", "-1/2"), ("1/2", "3/2"), ("-3/2", "1/2"), ("1/2", "-1/2", "3/2", "-3/2"),
             ("0",), ("1",), ("-2",), ("-1", "0", "1"), ("0", "1", "2"), ("-1", "0", "2"),
             ("1/2", "5/2")]


@pytest.mark.parametrize("state", FF_STATES, ids=lambda s: ",".join(s))
@pytest.mark.parametrize("R", [0.4, 1.5, 5.0])
def test_free_fermion_exact_spectrum(state, R):
    # exact free-fermion spectrum, both sectors, P = 0 and P != 0 (see free_fermion_level)
    level, k = free_fermion_level(state)
    res = solve_excited(FF, R, state)
    assert res.converged, res.message
    E, _, _ = level(R)
    assert abs(res.energy - E) <= 1e-12 * abs(E)
    assert abs(res.energy - E) <= res.error  # the error estimate bounds the true error
    assert res.momentum == pytest.approx(2 * math.pi * k / R, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("state", [("1/2", "-1/2"), ("1/2", "3/2"), ("1",), ("-1", "0", "2")],
                         ids=lambda s: ",".join(s))
@pytest.mark.parametrize("alpha", [-0.1, 0.1, 0.3])
@pytest.mark.parametrize("R", [1.0, 3.0])
def test_free_fermion_deformed_follows_flow(state, alpha, R):
    # Burgers flow with the P^2/R term solved by characteristics (Smirnov & Zamolodchikov,
    # Nucl. Phys. B915 (2017) 363; the boosted effective radius of docs/physics.md section 5),
    # applied to the exact undeformed level
    level, k = free_fermion_level(state)
    res = solve_excited(FF, R, state, ttbar(alpha))
    if res.status is Status.NO_REAL_SOLUTION:
        with pytest.raises(ValueError):  # the prediction has no real value either
            predict(level, R, alpha, k=k)
        return
    assert res.converged, res.message
    p = predict(level, R, alpha, k=k)
    assert abs(res.energy - p.energy) <= 1e-11 * abs(p.energy)
    assert res.momentum == pytest.approx(p.momentum, rel=1e-12, abs=1e-12)


def test_free_fermion_positive_level_has_no_real_solution_below_branch_point():
    # alpha < 0 pushes positive levels into a branch point (docs/physics.md section 4)
    res = solve_excited(FF, 1.0, ("1/2", "-1/2"), ttbar(-0.1))
    assert res.status is Status.NO_REAL_SOLUTION
    assert math.isnan(res.energy) and res.as_record()["energy"] is None


@pytest.mark.parametrize("state, alpha, R_min", [(("1/2", "-1/2"), -0.1, 0.4),
                                                 (("1/2", "3/2"), 0.1, 0.4),
                                                 (("-1", "0", "2"), 0.1, 0.4),
                                                 (("-1", "0", "2"), -0.1, 3.0)], ids=str)
def test_a_scan_started_from_its_previous_point_stays_on_the_level(state, alpha, R_min):
    # each point started from the previous radius's solution (the warm path of a scan) against
    # the characteristics of the exact level (as above); across the branch radius of the
    # positive P = 0 level at alpha < 0 (R_c = 1.584, the undeformed curve) the points below it
    # have no real solution, although each starts from a real one
    level, k = free_fermion_level(state)
    R_c = level_branch_point(level, alpha)[0] if state == ("1/2", "-1/2") else 0.0
    start = None
    for R in np.geomspace(4.0, R_min, 14):
        res = solve_excited(FF, R, state, ttbar(alpha), start=start)
        if R < R_c:
            assert res.status is Status.NO_REAL_SOLUTION, (R, R_c, res.message)
            continue
        assert res.converged, (R, res.message)
        p = predict(level, R, alpha, k=k)
        assert abs(res.energy - p.energy) <= 1e-11 * abs(p.energy), (R, res.energy, p.energy)
        start = res


def test_a_scan_extrapolating_its_starts_finds_the_same_levels_in_fewer_steps(monkeypatch):
    # along a scan the coarse grid starts from the linear extrapolation in R of the two previous
    # points' solutions, and each step of a continuation from that through its last two
    # (tba/solvers/excited.py, `extrapolated_guess`); the same scans from the
    # previous point alone must give the same statuses and energies within the summed error
    # estimates (common practice for a change of starting point, no source), in more Newton
    # steps (sinh-Gordon at its self-dual point, as in runs/sinh-gordon-levels.toml: the boosted
    # level 1/2,3/2 gains most, the level at rest little)
    from tba.solvers.excited import ExcitedEquations

    model = sinh_gordon(1.0)
    radii = np.geomspace(4.0, 1.0, 12)
    scans = [(("-1/2", "1/2"), 0.05), (("1/2", "3/2"), -0.05), (("1/2", "3/2"), 0.05)]
    extrapolated = ExcitedEquations.extrapolated_guess
    taken = []

    def counted(self, s1, s2, w=None):
        out = extrapolated(self, s1, s2, w)
        taken.append(out is not None)
        return out

    def scan(state, alpha):
        start, out = None, []
        for R in radii:
            res = solve_excited(model, R, state, ttbar(alpha), start=start)
            start = res if res.converged else start
            out.append(res)
        return out

    monkeypatch.setattr(ExcitedEquations, "extrapolated_guess", counted)
    fast = [res for state, alpha in scans for res in scan(state, alpha)]
    monkeypatch.setattr(ExcitedEquations, "extrapolated_guess", lambda self, s1, s2, w=None: None)
    plain = [res for state, alpha in scans for res in scan(state, alpha)]
    assert sum(taken) >= len(scans) * (len(radii) - 3)
    for a, b in zip(fast, plain, strict=True):
        assert a.status is b.status is Status.CONVERGED, (a.radius, a.message, b.message)
        assert abs(a.energy - b.energy) <= a.error + b.error, a.radius
    assert sum(r.iterations for r in fast) < 0.95 * sum(r.iterations for r in plain)


def _status_bisection(model, state, alpha, lo, hi, rel=2e-10, tol=1e-9):
    """Smallest radius with a real solution, by bisection on the solver's status, at a
    tolerance the conditioning allows next to the branch point (rounding is amplified like
    dE/dR ~ (R - R_c)^(-1/2): within ~1e-7 of R_c tol 1e-12 is out of reach)."""
    while hi - lo > rel * hi:
        mid = 0.5 * (lo + hi)
        if solve_excited(model, mid, state, ttbar(alpha), tol=tol).converged:
            hi = mid
        else:
            lo = mid
    return hi


def test_branch_radius_from_solver_matches_undeformed_curve_free_fermion():
    # alpha < 0: the branch radius predicted from the undeformed curve, min over R~ of
    # R~ - alpha E(R~) (docs/physics.md section 4), against where the solver stops finding a real
    # solution; exact free-fermion level as the curve
    state, alpha = ("1/2", "-1/2"), -0.1
    level, _ = free_fermion_level(state)
    R_c, _, _ = level_branch_point(level, alpha)
    found = _status_bisection(FF, state, alpha, 0.99 * R_c, 1.01 * R_c)
    assert abs(found - R_c) <= 1e-8 * R_c


@pytest.mark.slow
def test_branch_radius_from_solver_matches_undeformed_curve_sinh_gordon():
    # same check for an interacting positive level: the curve is the model's own TBA level
    state, alpha = ("-3/2", "3/2"), -0.1
    R_c, _, _ = level_branch_point(ExcitedCurve(SG, state), alpha)
    found = _status_bisection(SG, state, alpha, 0.99 * R_c, 1.01 * R_c)
    assert abs(found - R_c) <= 1e-8 * R_c


def test_sinh_gordon_approaches_bethe_yang_exponentially():
    # finite-size corrections beyond Bethe-Yang are O(e^{-mR}) (Luscher 1986; docs/physics.md
    # section 5: the difference falls by ~10 per 2 units of R between R = 4 and 10)
    state = ("1/2", "-1/2")
    radii = [4.0, 6.0, 8.0, 10.0]
    diffs = []
    for R in radii:
        res = solve_excited(SG, R, state)
        assert res.converged
        diffs.append(abs(res.energy - bethe_yang_energy(SG, R, state)[0]))
    ratios = [diffs[i] / diffs[i + 1] for i in range(len(diffs) - 1)]
    for r in ratios:
        assert 5.0 < r < 15.0  # e^{2} = 7.4 up to powers of R
    for R, d in zip(radii, diffs):
        assert d < 20 * math.exp(-R)


@pytest.mark.parametrize("state", [("1/2", "-1/2"), ("1/2", "3/2"), ("-1", "0", "1"), ("-1", "0", "2")],
                         ids=lambda s: ",".join(s))
@pytest.mark.parametrize("alpha", [-0.1, 0.1])
def test_sinh_gordon_deformed_follows_flow_from_own_levels(state, alpha):
    # deformed 2- and 3-particle levels against the flow prediction built from the model's own
    # undeformed levels (characteristics, docs/physics.md sections 4-5)
    # (radii where every one of these levels is real; where levels stop being real is tested
    # by the branch-radius tests)
    curve = ExcitedCurve(SG, state)
    for R in (2.0, 3.0):
        res = solve_excited(SG, R, state, ttbar(alpha))
        assert res.converged, res.message
        p = predict(curve, R, alpha, k=float(sum(curve.state)))
        assert abs(res.energy - p.energy) <= 1e-10 * abs(p.energy)


def test_labels_stay_attached_along_a_scan():
    # warm-started radii keep the quantum numbers; the result equals a cold solve
    state = ("1/2", "3/2")
    start = None
    for R in (3.0, 2.0, 1.2):
        warm = solve_excited(SG, R, state, ttbar(0.1), start=start)
        cold = solve_excited(SG, R, state, ttbar(0.1))
        assert warm.state == cold.state == parse_state(state)
        assert warm.energy == pytest.approx(cold.energy, rel=1e-12)
        start = warm


def test_exact_radius_derivative_matches_finite_difference():
    # dE/dR from the linearised equations vs a centred difference (common practice, no source)
    curve = ExcitedCurve(SG, ("1/2", "3/2"))
    E, dE, _ = curve(2.0)
    h = 1e-4
    fd = (curve(2.0 + h)[0] - curve(2.0 - h)[0]) / (2 * h)
    assert dE == pytest.approx(fd, rel=1e-7)


def test_json_record_carries_state_momentum_and_rapidities():
    res = solve_excited(FF, 2.0, ("1/2", "3/2"))
    rec = res.as_record()
    assert rec["state"] == [0.5, 1.5]
    assert rec["momentum"] == pytest.approx(2 * math.pi * 2 / 2.0)
    # free fermion: R sinh t_j = 2 pi n_j exactly (textbook)
    assert rec["rapidities"] == pytest.approx([math.asinh(math.pi * 0.5), math.asinh(math.pi * 1.5)],
                                              rel=1e-13)


@pytest.mark.parametrize("state, match", [
    (("1/2",), "integers"),
    (("1", "2"), "half-odd"),
    (("1/2", "1/2"), "distinct"),
    ((), "at least one"),
    (("x",), "fraction"),
])
def test_bad_states_are_refused(state, match):
    with pytest.raises(ValueError, match=match):
        solve_excited(FF, 1.0, state)


def test_models_outside_the_real_rapidity_scheme_are_refused():
    with pytest.raises(ValueError, match="bound states"):
        solve_excited(lee_yang(), 1.0, ("0",))
    with pytest.raises(ValueError, match="kernel callable|block content"):
        solve_excited(user_model([1.0], kernel=lambda t: 0 * t, pole_distance=1.0), 1.0, ("0",))


# -- sinh-Gordon at and near the self-dual point B = 1 ------------------------------------------
# The poles of psi at +-i pi (1 - B) / 2 pinch the real axis there; they are integrated exactly
# (tba.solvers.excited.NearPoles).

@pytest.mark.parametrize("state", [("1/2", "-1/2"), ("0",)], ids=["-1/2,1/2", "0"])
def test_sinh_gordon_levels_are_analytic_through_the_self_dual_point(state):
    # S depends on B through sin(pi B / 2) only (docs/physics.md section 2): a level is analytic and
    # even in 1 - B. A polynomial in (1 - B)^2 through B in [0.70, 0.84] (poles far enough for
    # the plain trapezoid rule) must predict the levels at 0.9, 0.95 and 1 (poles subtracted;
    # at B = 1 the particle at rest sits on a grid point, where e^-eps has a double zero)
    Bs = np.linspace(0.70, 0.84, 8)
    E = [solve_excited(sinh_gordon(B), 1.0, state).energy for B in Bs]
    coef = np.polyfit((1 - Bs) ** 2, E, 7)
    for B in (0.9, 0.95, 1.0, 1.05):
        res = solve_excited(sinh_gordon(B), 1.0, state)
        assert res.converged, res.message
        assert abs(np.polyval(coef, (1 - B) ** 2) - res.energy) < 1e-10


@pytest.mark.parametrize("alpha", [-0.1, 0.1])
@pytest.mark.parametrize("R", [1.0, 2.0])
def test_self_dual_sinh_gordon_moving_level_follows_the_flow(alpha, R):
    # P != 0: the deformed level is the undeformed one at R~ = sqrt((R + alpha E)^2 - (alpha P)^2),
    # boosted: E R~ = (R + alpha E) E_0(R~) + alpha P^2 R / R~ (docs/physics.md sections 4 and 5)
    state = ("1/2", "3/2")
    res = solve_excited(sinh_gordon(1.0), R, state, ttbar(alpha))
    assert res.converged, res.message
    E, P = res.energy, res.momentum
    A = R + alpha * E
    Rt = math.sqrt(A * A - (alpha * P) ** 2)
    ref = solve_excited(sinh_gordon(1.0), Rt, state)
    predicted = (A * ref.energy + alpha * P * P * R / Rt) / Rt
    assert abs(E - predicted) <= 1e-11 * abs(E) + res.error + ref.error * A / Rt


def test_self_dual_sinh_gordon_approaches_bethe_yang_and_bounds_its_error():
    # the difference from Bethe-Yang falls like e^{-m R} times a decreasing power of R
    # (docs/physics.md section 5; Luscher): per two units of R by a factor between e^{-2} and e^{-2}/4
    state = ("1/2", "-1/2")
    gaps = [solve_excited(sinh_gordon(1.0), R, state).energy
            - bethe_yang_energy(sinh_gordon(1.0), R, state)[0] for R in (4.0, 6.0, 8.0)]
    for a, b in zip(gaps, gaps[1:]):
        assert math.exp(-2) / 4 < b / a < math.exp(-2)
    # the error estimate at tol 1e-8 bounds the error (tol 1e-12 as reference; common practice)
    for R in (0.3, 1.0):
        loose = solve_excited(sinh_gordon(1.0), R, ("1/2", "3/2"), tol=1e-8)
        tight = solve_excited(sinh_gordon(1.0), R, ("1/2", "3/2"), tol=1e-12)
        assert abs(loose.energy - tight.energy) <= loose.error + tight.error


@pytest.mark.parametrize("B, R, approx", [(0.6, 0.3, -36.0), (1.0, 0.3, -36.0), (1.0, 0.6, -9.19)])
def test_strongly_boosted_level_is_a_genuine_solution(B, R, approx):
    # alpha < 0 and P != 0 drive R~ = sqrt((R + alpha E)^2 - (alpha P)^2) towards 0. A solution
    # must keep R + alpha E > |alpha P| with the exact momentum 2 pi sum I_k / R (otherwise the
    # driving term is unbounded below and the numbers depend on the grid's cutoff), and then it
    # obeys the boosted flow relation (docs/physics.md sections 4 and 5). The energies lie on the
    # branch that comes from large R at alpha = -0.05 (R = 0.6 at B = 1 is reached only along it).
    alpha, state = -0.05, ("1/2", "3/2")
    res = solve_excited(sinh_gordon(B), R, state, ttbar(alpha))
    assert res.converged, res.message
    P = 2 * math.pi * 2 / R
    A = R + alpha * res.energy
    assert A > abs(alpha * P) and res.momentum == pytest.approx(P, rel=1e-12)
    Rt = math.sqrt(A * A - (alpha * P) ** 2)
    ref = solve_excited(sinh_gordon(B), Rt, state)
    predicted = (A * ref.energy + alpha * P * P * R / Rt) / Rt
    assert abs(res.energy - predicted) <= res.error + ref.error * A / Rt + 1e-11 * abs(res.energy)
    assert res.energy == pytest.approx(approx, abs=0.5)
