"""CDD deformations: the TTbar flow relation, warm starts, higher spins, branch points."""

import math

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from tba import (CDD, Status, free_fermion, higher_spin, ising_e8, lee_yang, sinh_gordon,
                 solve_ground_state, solve_radii, ttbar)

MODELS = {
    "free-fermion": free_fermion(),
    "sinh-gordon": sinh_gordon(0.6),
    "lee-yang": lee_yang(),
    "ising-e8": ising_e8(),
}
ALPHAS = [-0.5, -0.1, 0.1, 0.3]


# --------------------------------------------------------------------------------------
# TTbar flow relation, every model
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", list(MODELS))
@pytest.mark.parametrize("alpha", ALPHAS)
@pytest.mark.parametrize("R", [1.0, 3.0])
def test_flow_relation(name, alpha, R):
    # E_0(R, alpha) = E_0(R + alpha E_0(R, alpha), 0) (docs/physics.md section 4; Smirnov &
    # Zamolodchikov 2017, Cavaglia et al. 2016, from memory). R = 1, 3 lie above the branch
    # radius for alpha <= 0.3 in every model (sinh-Gordon: R_c = 0.64 at alpha = 0.3, below).
    model = MODELS[name]
    r = solve_ground_state(model, R, ttbar(alpha))
    assert r.status is Status.CONVERGED, r.message
    R_eff = R + alpha * r.energy
    r0 = solve_ground_state(model, R_eff)
    assert r0.converged, r0.message
    mismatch = abs(r.energy - r0.energy)
    assert mismatch <= 1e-11 * abs(r.energy)
    # the error estimate accounts for the mismatch, up to the undeformed solve's own error
    assert r.error >= mismatch - r0.error
    assert r.effective_radius == pytest.approx(R_eff, rel=1e-14)
    # alpha E < 0 for alpha > 0 (E < 0): the effective radius shrinks and E_0 (increasing in
    # R) drops (sign convention, docs/physics.md section 4); a wrong sign of the CDD kernel would
    # move it the other way
    assert (r.energy - solve_ground_state(model, R).energy) * alpha < 0


def test_flow_relation_is_not_trivial():
    # guard: the deformation changes the energy by far more than the 1e-11 tolerance
    # (otherwise the flow-relation test could pass with the deformation ignored)
    for model in MODELS.values():
        a = solve_ground_state(model, 1.0, ttbar(0.1)).energy
        b = solve_ground_state(model, 1.0).energy
        assert abs(a - b) > 1e-3 * abs(b)


@pytest.mark.parametrize("name", list(MODELS))
@pytest.mark.parametrize("alpha", [None, 0.1, -0.3])
def test_warm_started_scan_equals_cold_solves(name, alpha):
    # solve_radii warm-starts each point from the last (tba/solvers/ground.py); the answer must not
    # depend on the starting point (common practice, no source)
    model = MODELS[name]
    deformation = None if alpha is None else ttbar(alpha)
    radii = np.linspace(0.8, 4.0, 9)
    warm = solve_radii(model, radii, deformation)
    assert len(warm) == len(radii)
    for R, w in zip(radii, warm):
        cold = solve_ground_state(model, R, deformation)
        assert w.converged and cold.converged
        assert w.radius == R
        assert abs(w.energy - cold.energy) <= 1e-12 * abs(cold.energy)


def test_warm_start_across_couplings():
    # start= may come from another coupling (solve_ground_state docstring)
    model = MODELS["lee-yang"]
    seed = solve_ground_state(model, 2.0, ttbar(0.1))
    warm = solve_ground_state(model, 2.0, ttbar(0.3), start=seed)
    cold = solve_ground_state(model, 2.0, ttbar(0.3))
    assert abs(warm.energy - cold.energy) <= 1e-12 * abs(cold.energy)


# --------------------------------------------------------------------------------------
# higher-spin CDD factors against a dense, deliberately naive solver
# --------------------------------------------------------------------------------------

def dense_reference(kernel, R, couplings, h=0.05, X=50.0):
    """Ground-state energy from a plain dense discretisation (written for this test).

    Uniform grid t_k = k h covering R (cosh t - 1) <= X; the full kernel matrix
    phi(t_i - t_j) + sum_s alpha_s s cosh(s (t_i - t_j)) (kernel convention of
    docs/physics.md section 4, no separable trick); damped fixed-point iteration
    eps <- (eps + nu - (h/2pi) Phi L(eps)) / 2 until L stops changing; then
    E = -(1/2pi) sum h cosh t L (docs/physics.md section 1). The trapezoid rule converges
    exponentially for these analytic integrands (common practice, no source).
    """
    n = int(math.ceil(math.acosh(1 + X / R) / h))
    t = np.arange(-n, n + 1) * h
    d = t[:, None] - t[None, :]
    phi = kernel(d)
    for s, a in couplings.items():
        phi = phi + a * s * np.cosh(s * d)
    K = h * phi / (2 * np.pi)
    nu = R * np.cosh(t)
    eps = nu.copy()
    L = np.logaddexp(0.0, -eps)
    for _ in range(2000):
        eps = 0.5 * eps + 0.5 * (nu - K @ L)
        L_new = np.logaddexp(0.0, -eps)
        change = np.max(np.abs(L_new - L))
        L = L_new
        if change <= 1e-17:
            break
    else:
        raise AssertionError("dense reference did not converge")
    return -(h / (2 * np.pi)) * np.sum(np.cosh(t) * L)


_S06 = math.sin(math.pi * 0.3)


def _sg_kernel(t):
    # sinh-Gordon B = 0.6 (docs/physics.md section 2)
    return 2 * _S06 * np.cosh(t) / (np.sinh(t) ** 2 + _S06 ** 2)


def _ff_kernel(t):
    return np.zeros_like(t)


SPIN3_CASES = [
    pytest.param("sinh-gordon", _sg_kernel, {3: -0.01}, id="sg-spin3"),
    pytest.param("sinh-gordon", _sg_kernel, {1: 0.1, 3: -0.01}, id="sg-ttbar+spin3"),
    pytest.param("free-fermion", _ff_kernel, {3: -0.01}, id="ff-spin3"),
    pytest.param("free-fermion", _ff_kernel, {1: 0.1, 3: -0.01}, id="ff-ttbar+spin3"),
]

def _deformation(couplings):
    d = CDD({})
    for s, a in couplings.items():
        d = d + (ttbar(a) if s == 1 else higher_spin(s, a))
    return d


@pytest.mark.parametrize("name, kernel, couplings", SPIN3_CASES)
def test_dense_reference_is_converged(name, kernel, couplings):
    # the reference itself: halving-ish the spacing and widening the cutoff changes nothing,
    # and the spin-3 term matters (its sign flips the energy by far more than 1e-10)
    a = dense_reference(kernel, 1.0, couplings, h=0.05, X=50.0)
    b = dense_reference(kernel, 1.0, couplings, h=0.035, X=60.0)
    assert abs(a - b) <= 1e-14 * abs(a)
    no3 = {s: c for s, c in couplings.items() if s != 3}
    assert abs(a - dense_reference(kernel, 1.0, {**no3, 3: -0.02})) > 1e-4 * abs(a)


@pytest.mark.parametrize("name, kernel, couplings", SPIN3_CASES)
def test_higher_spin_matches_dense_solver(name, kernel, couplings):
    # spin-3 CDD kernel alpha_3 * 3 cosh(3t) (docs/physics.md section 4), default tol 1e-12.
    # Regression: at commit f20d048 these came back NOT_CONVERGED (the grid rule ignored that
    # a cosh(3t) term in eps brings the singularities of L towards the real axis)
    r = solve_ground_state(MODELS[name], 1.0, _deformation(couplings))
    assert r.converged, r.message
    ref = dense_reference(kernel, 1.0, couplings)
    assert abs(r.energy - ref) <= 1e-10 * abs(ref)
    assert r.error >= abs(r.energy - ref) - 1e-15 * abs(ref)


@pytest.mark.parametrize("name, kernel, couplings", SPIN3_CASES)
def test_higher_spin_matches_dense_solver_loose_tol(name, kernel, couplings):
    # a looser tolerance must work too and its error estimate must hold (docs/physics.md section 4
    # for the spin-3 kernel convention)
    r = solve_ground_state(MODELS[name], 1.0, _deformation(couplings), tol=1e-8)
    assert r.converged, r.message
    ref = dense_reference(kernel, 1.0, couplings)
    assert abs(r.energy - ref) <= 1e-8 * abs(ref)
    assert r.error >= abs(r.energy - ref)


def test_higher_spin_rejected_where_the_model_has_no_charge():
    # tba/models/charges.py: E8 has conserved charges of the spins coprime to 30 only
    # (A.B. Zamolodchikov, Int. J. Mod. Phys. A4 (1989) 4235)
    with pytest.raises(ValueError, match="spin-3 charge; allowed spins are s = 1, 7, 11"):
        solve_ground_state(MODELS["ising-e8"], 1.0, higher_spin(3, -0.01))


# --------------------------------------------------------------------------------------
# branch point (Hagedorn side, alpha > 0)
# --------------------------------------------------------------------------------------

SG = MODELS["sinh-gordon"]
ALPHA_BRANCH = 0.3


def test_sinh_gordon_no_real_solution():
    # below R_c the two solutions are complex (docs/physics.md section 4)
    r = solve_ground_state(SG, 0.3, ttbar(ALPHA_BRANCH))
    assert r.status is Status.NO_REAL_SOLUTION
    assert math.isnan(r.energy) and math.isnan(r.error)
    assert r.as_record()["energy"] is None
    assert r.as_record()["status"] == "no-real-solution"


@pytest.fixture(scope="module")
def branch_radius_from_status():
    """R_c by bisection on the status of deformed solves (log scale, to 1e-5 relative), at a
    tolerance the conditioning allows that close to R_c (rounding is amplified like dE/dR,
    ~ (R - R_c)^(-1/2); closer than ~1e-4 the solver refuses tol 1e-12 with a message)."""
    def status(R):
        return solve_ground_state(SG, R, ttbar(ALPHA_BRANCH), tol=1e-9).status

    lo, hi = 0.3, 1.0
    assert status(lo) is Status.NO_REAL_SOLUTION and status(hi) is Status.CONVERGED
    while hi / lo - 1 > 1e-5:
        mid = math.sqrt(lo * hi)
        s = status(mid)
        assert s in (Status.CONVERGED, Status.NO_REAL_SOLUTION), (mid, s)
        if s is Status.CONVERGED:
            hi = mid
        else:
            lo = mid
    return lo, hi


def test_branch_radius_status_switches_cleanly(branch_radius_from_status):
    # just above R_c the solve converges, just below there is no real solution
    lo, hi = branch_radius_from_status
    above = solve_ground_state(SG, hi * (1 + 1e-3), ttbar(ALPHA_BRANCH))
    below = solve_ground_state(SG, lo * (1 - 1e-3), ttbar(ALPHA_BRANCH))
    assert above.status is Status.CONVERGED, above.message
    assert below.status is Status.NO_REAL_SOLUTION, below.message


def test_branch_radius_matches_flow_relation(branch_radius_from_status):
    # independent R_c: R(R') = R' - alpha E_0(R') from UNDEFORMED solves has its minimum at
    # the branch point, E_0'(R'_*) = 1/alpha (docs/physics.md section 4)
    def radius_of(Rp):
        r0 = solve_ground_state(SG, Rp)
        assert r0.converged
        return Rp - ALPHA_BRANCH * r0.energy

    opt = minimize_scalar(radius_of, bounds=(0.05, 1.0), method="bounded",
                          options={"xatol": 1e-7})
    Rc = opt.fun
    lo, hi = branch_radius_from_status
    assert lo * (1 - 1e-4) <= Rc <= hi * (1 + 1e-4), (Rc, lo, hi)
    # the CFT estimate sqrt(2 pi c alpha / 3) with c between 1/2 and 1 brackets it roughly
    assert math.sqrt(2 * math.pi * 0.5 * ALPHA_BRANCH / 3) < Rc < math.sqrt(2 * math.pi * ALPHA_BRANCH / 3)
