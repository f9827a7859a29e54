"""Continuation through the fold of the deformed ground state: the fold (R_c), the second real
branch and the complex-conjugate pair, each against the corresponding root of the flow
relation R' = R + alpha E_0(R') (docs/physics.md section 4).

Every solution of the TTbar-deformed ground-state equations at radius R is an undeformed
solution at the effective radius R' = R + alpha E (the CDD term only shifts the radius), so:
the physical branch is the root R' > R'_*, the second branch the real root R' < R'_*, and past
R_c the pair is a complex-conjugate pair of roots. The references solve that scalar equation
with the undeformed curve only (brentq for real roots, complex Newton for the pair).
"""

import functools
import math

import numpy as np
import pytest
from scipy.optimize import brentq

from reference import (dense_tba_complex, deformed_free_fermion_branch, flow_root, free_fermion_ns_energy,
                       free_fermion_ns_energy_complex)
from tba import free_fermion, ising_e8, lee_yang, sinh_gordon, solve_ground_state, ttbar
from tba.physics.continuation import ComplexEquations, complex_pair, locate_fold, second_branch
from tba.models.cdd import NO_DEFORMATION
from tba.physics.flow import UndeformedCurve, branch_point
from tba.solvers.grid import choose_grid
from tba.solvers.ground import Discretization, energy_derivatives

FF = free_fermion()
SG = sinh_gordon(0.6)
LY = lee_yang()
MODELS = {"free-fermion": FF, "sinh-gordon": SG, "lee-yang": LY}

# sinh-Gordon kernel written out from docs/physics.md section 2 (not taken from the package):
# phi(t) = 2 sin(pi B/2) cosh t / (sinh^2 t + sin^2(pi B/2)), B = 0.6
_S = math.sin(math.pi * 0.6 / 2)


def sinh_gordon_kernel(t):
    return 2 * _S * np.cosh(t) / (np.sinh(t) ** 2 + _S * _S)


@functools.lru_cache(maxsize=None)
def fold_and_branch(name, alpha):
    model = MODELS[name]
    return locate_fold(model, ttbar(alpha)), branch_point(model, alpha)


@functools.lru_cache(maxsize=None)
def curve(name):
    return UndeformedCurve(MODELS[name])


# --------------------------------------------------------------------------------------
# the fold: R_c from continuation against R_c from the undeformed curve
# --------------------------------------------------------------------------------------

def _check_fold(fold, bp):
    assert bp.status == "found"
    assert abs(fold.value - bp.radius) <= 1e-9 * bp.radius
    assert abs(fold.energy - bp.energy) <= 1e-9 * abs(bp.energy)
    # the continuation's own error estimate is small and consistent with the difference
    assert fold.value_error <= 1e-11
    assert abs(fold.value - bp.radius) <= fold.value_error + bp.radius_error + 1e-13
    # at the fold the Jacobian is singular: det of the CDD capacitance matrix -> 0
    # (tba.solvers.ground docstring); R(s) has a minimum there: d^2 R/ds^2 > 0
    assert abs(fold.fold_indicator) <= 1e-8
    assert fold.second_derivative > 0


@pytest.mark.parametrize("alpha", [0.05, 0.2, 1.0])
@pytest.mark.parametrize("name", ["free-fermion", "sinh-gordon"])
def test_fold_matches_branch_point(name, alpha):
    # two independent routes to R_c (README/docs/physics.md section 4): pseudo-arclength
    # continuation of the deformed equations to dR/ds = 0, and E_0'(R'_*) = 1/alpha on the
    # undeformed curve
    fold, bp = fold_and_branch(name, alpha)
    _check_fold(fold, bp)
    if name == "free-fermion":
        # outside reference: the Bessel series (reference.deformed_free_fermion_branch)
        r_star, r_c = deformed_free_fermion_branch(alpha)
        assert abs(fold.value - r_c) <= 1e-9 * r_c
        assert abs(fold.energy - free_fermion_ns_energy(r_star)) <= 1e-9


@pytest.mark.slow
def test_fold_matches_branch_point_e8():
    # as above for E8 at one coupling (the continuation costs ~4 s here)
    e8 = ising_e8()
    _check_fold(locate_fold(e8, ttbar(0.2)), branch_point(e8, 0.2))


def test_fold_in_alpha_at_fixed_radius_is_the_inverse_of_rc():
    # parameter="alpha": the coupling alpha_c at which R = 0.5 is the branch radius must satisfy
    # R_c(alpha_c) = 0.5 (same fold, crossed in the other parameter; docs/physics.md section 4)
    fold = locate_fold(SG, ttbar(0.1), parameter="alpha", radius=0.5)
    assert fold.parameter == "alpha"
    bp = branch_point(SG, fold.value)
    assert abs(bp.radius - 0.5) <= 1e-9
    assert abs(bp.energy - fold.energy) <= 1e-9 * abs(bp.energy)
    # the deformed solve just below alpha_c converges, just above it has no real solution
    assert solve_ground_state(SG, 0.5, ttbar(fold.value * (1 - 1e-5))).converged
    assert solve_ground_state(SG, 0.5, ttbar(fold.value * (1 + 1e-5))).status.value == "no-real-solution"


# --------------------------------------------------------------------------------------
# the second (unphysical) real branch
# --------------------------------------------------------------------------------------

def _second_root(energy, radius, alpha, r_star):
    """The real root R' < R'_* of R' - alpha E_0(R') = R, by brentq: g(R'_*) = R_c - R < 0 and
    g -> +inf as R' -> 0 (E_0 ~ -pi c/(6R')), so halving the lower end brackets it."""
    g = lambda r: r - alpha * energy(r) - radius  # noqa: E731
    lo = 0.5 * r_star
    while g(lo) < 0:
        lo *= 0.5
    r_prime = brentq(g, lo, r_star, xtol=1e-15, rtol=1e-15, maxiter=200)
    return r_prime, energy(r_prime)


def _undeformed_energy(name):
    if name == "free-fermion":
        return free_fermion_ns_energy  # outside reference (Bessel series)
    c = curve(name)  # the adaptive undeformed solver: no CDD terms, no continuation
    return lambda r: c(r)[0]


@pytest.mark.parametrize("factor", [1.05, 1.5])
@pytest.mark.parametrize("name", ["free-fermion", "sinh-gordon", "lee-yang"])
def test_second_branch_is_the_other_real_root(name, factor):
    alpha = 0.2
    fold, bp = fold_and_branch(name, alpha)
    R = bp.radius * factor
    sol = second_branch(fold, R)
    assert sol.label == "second-branch" and sol.radius == R
    r_prime, E = _second_root(_undeformed_energy(name), R, alpha, bp.effective_radius)
    assert abs(sol.energy - E) <= 1e-9 * max(1.0, abs(E)), (sol.energy, E)
    assert r_prime < bp.effective_radius
    # on the second branch the capacitance determinant is negative (past the fold)
    assert sol.fold_indicator < 0


# regression: second_branch used to stay on the fold's grid (built for R' ~ R'_*); at 4 R_c
# (R' = 0.0297) its cutoff truncated the tails, 1.6e-8 off with no error estimate
def test_second_branch_far_from_the_fold():
    alpha = 0.2
    fold, bp = fold_and_branch("free-fermion", alpha)
    R = 4 * bp.radius
    sol = second_branch(fold, R)
    r_prime, E = _second_root(free_fermion_ns_energy, R, alpha, bp.effective_radius)
    assert abs(sol.energy - E) <= 1e-9 * abs(E), (sol.energy, E)
    assert abs(sol.energy - E) <= sol.error


# --------------------------------------------------------------------------------------
# the complex-conjugate pair below R_c
# --------------------------------------------------------------------------------------

def _pair_guess(name, bp, radius, alpha):
    """Start for the complex root: near the fold R ~ R_c + (-alpha E_0''/2) (R' - R'_*)^2, so
    R' ~ R'_* + i sqrt(2 (R_c - R) / (-alpha E_0''(R'_*))) (the member with Im R' > 0)."""
    d2 = energy_derivatives(curve(name).solve(bp.effective_radius), spins=(), second=True)["d2E_dR2"]
    return bp.effective_radius + 1j * math.sqrt(2 * (bp.radius - radius) / (-alpha * d2))


def _complex_reference(name):
    if name == "free-fermion":
        # outside reference: the Bessel series continued to complex radius (scipy kv, kvp)
        return free_fermion_ns_energy_complex
    # the plain dense complex TBA of reference.py with the kernel written out above; h = 0.15
    # resolves the strip |Im t| < pi/2 - arg R' (>= 0.7 here) to e^{-2 pi 0.7/0.15} ~ 1e-13, and
    # keeps N ~ 80 (agrees with h = 0.1, x_max = 50 to 1e-15 at these radii, checked by hand)
    return lambda z: dense_tba_complex([1.0], sinh_gordon_kernel, z, 0.15, 40.0)


@pytest.mark.parametrize("name, factor", [
    ("free-fermion", 0.99), ("free-fermion", 0.9),
    ("sinh-gordon", 0.99), ("sinh-gordon", 0.9), ("sinh-gordon", 0.6),
])
def test_complex_pair_is_the_complex_root(name, factor):
    alpha = 0.2
    fold, bp = fold_and_branch(name, alpha)
    R = bp.radius * factor
    sol = complex_pair(fold, R)
    assert sol.label == "complex-pair" and sol.energy.imag > 0
    assert sol.conjugate_energy == np.conj(sol.energy)
    r_prime, E = flow_root(_complex_reference(name), R, alpha, _pair_guess(name, bp, R, alpha))
    assert abs(sol.energy - E) <= 1e-9 * abs(E), (sol.energy, E)
    assert abs(r_prime - (R + alpha * sol.energy)) <= 1e-9 * abs(r_prime)


# regression: complex_pair used to stay on the fold's grid; at 0.6 R_c (arg R' = 53 deg) the
# singularities of L sit at |Im t| = pi/2 - arg R' and that spacing was 4.8e-8 off
def test_complex_pair_far_below_rc_free_fermion():
    alpha = 0.2
    fold, bp = fold_and_branch("free-fermion", alpha)
    R = 0.6 * bp.radius
    sol = complex_pair(fold, R)
    r_prime, E = flow_root(free_fermion_ns_energy_complex, R, alpha, _pair_guess("free-fermion", bp, R, alpha))
    assert abs(sol.energy - E) <= 1e-9 * abs(E), (sol.energy, E)
    assert abs(sol.energy - E) <= sol.error  # the error estimate bounds the true error


def _complex_equations_energy(model, ref_radius, guess):
    """E_0(z), dE_0/dz from tba.physics.continuation.ComplexEquations with zero deformation and complex
    radius z, on a grid the solver's rule picks for the strip pi/2 - |arg z| of L at z ~ ``guess``
    (with a margin: the grid of the real radius is too coarse once the strip narrows)."""
    res = solve_ground_state(model, ref_radius, tol=1e-13)
    strip = math.pi / 2 - abs(np.angle(guess)) - 0.1
    grid = choose_grid(math.inf, 1.0, abs(guess), 1e-13, 1, cutoff_extra=4.0, strip=strip,
                       decay_radius=0.9 * guess.real)
    disc = Discretization(model, NO_DEFORMATION, ref_radius, grid)
    start = disc.initial_guess(res._state)

    def energy(z):
        eqs = ComplexEquations(disc, radius=z)
        e, L, dL, residual, ok = eqs.newton(start * (z / ref_radius))
        assert ok
        return eqs.energy(L), eqs.derivative_radius(L, dL)
    return energy


@pytest.mark.parametrize("name, factor", [("sinh-gordon", 0.9), ("sinh-gordon", 0.6), ("free-fermion", 0.9)])
def test_complex_equations_at_complex_radius(name, factor):
    # the undeformed equations continued to complex R' (ComplexEquations, the route the brief
    # of complex_pair relies on) against the outside complex references, for E_0 and for the
    # complex derivative from the linearised equations; then Newton in R' with them finds the
    # same root as complex_pair
    alpha = 0.2
    fold, bp = fold_and_branch(name, alpha)
    R = bp.radius * factor
    guess = _pair_guess(name, bp, R, alpha)
    reference = _complex_reference(name)
    ours = _complex_equations_energy(MODELS[name], bp.effective_radius, guess)
    r_ref, E_ref = flow_root(reference, R, alpha, guess)
    E, dE = ours(r_ref)
    E_x, dE_x = reference(r_ref)
    assert abs(E - E_x) <= 1e-10 * abs(E_x)
    assert abs(dE - dE_x) <= 1e-9 * abs(dE_x)
    r_ours, E_ours = flow_root(ours, R, alpha, guess)
    assert abs(r_ours - r_ref) <= 1e-10 * abs(r_ref)
    assert abs(complex_pair(fold, R).energy - E_ours) <= 1e-9 * abs(E_ours)
