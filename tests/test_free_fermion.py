"""The free Majorana fermion (phi = 0) against its closed form, undeformed and TTbar-deformed.

References live in tests/reference.py (Bessel series of the NS ground state, and the
flow relation solved as a scalar equation with scipy.optimize.brentq).
"""

import math

import numpy as np
import pytest
from scipy.special import k1

from reference import (deformed_free_fermion_branch, deformed_free_fermion_energy,
                       free_fermion_ns_energy, free_fermion_ns_energy_derivative)
from tba import Status, free_fermion, solve_ground_state, ttbar

FF = free_fermion()

RADII = [float(R) for R in np.logspace(-3, math.log10(30.0), 25)]
# regression: here the coarse level's trapezoid error happened to be small (it oscillates
# with R and h), and with levels only 2^(1/4) apart the two-grid estimate (1.56e-13) fell
# below the true error (1.74e-13); levels are now sqrt(2) apart
OSCILLATION_CASE = 0.07336132885411532
# regression: at commit f20d048 refinement levels 0 and 1 picked the same grid here, and the
# solver returned a relative error of 1.95e-11 (tol 1e-12) with an estimate of 4.7e-18
WORST_CASE = 6.92


def _params(radii):
    return [pytest.param(R, id=f"R={R:.4g}") for R in radii]


def test_reference_series_is_converged():
    # Bessel series (docs/physics.md section 2): the truncated alternating series must not
    # change when many more terms are added; and dE/dR from the K_1' series agrees with
    # a centred difference (common practice, no source).
    for R in [1e-3, 0.1, 2.0]:
        k = np.arange(1, 200001, dtype=float)
        many = -math.fsum(((-1.0) ** (k + 1) * k1(k * R) / k).tolist()) / math.pi
        assert free_fermion_ns_energy(R) == pytest.approx(many, rel=1e-14, abs=0)
        d = 1e-5 * R
        fd = (free_fermion_ns_energy(R + d) - free_fermion_ns_energy(R - d)) / (2 * d)
        assert free_fermion_ns_energy_derivative(R) == pytest.approx(fd, rel=1e-7)


def test_reference_ultraviolet_limit():
    # E_NS -> -pi c/(6R) with c = 1/2 (docs/physics.md section 3; textbook)
    R = 1e-3
    assert -6 * R * free_fermion_ns_energy(R) / math.pi == pytest.approx(0.5, abs=1e-5)


@pytest.mark.parametrize("R", _params(RADII))
def test_energy_matches_bessel_series(R):
    # Bessel series, docs/physics.md section 2 (checked there to 1e-14); solver tol = 1e-12
    r = solve_ground_state(FF, R)
    assert r.status is Status.CONVERGED, r.message
    exact = free_fermion_ns_energy(R)
    assert abs(r.energy - exact) <= 1e-12 * abs(exact)


@pytest.mark.parametrize("R", _params(RADII + [OSCILLATION_CASE]))
def test_error_estimate_bounds_true_error(R):
    # the documented meaning of SolveResult.error (tba/result.py docstring) vs the series
    r = solve_ground_state(FF, R)
    exact = free_fermion_ns_energy(R)
    assert r.converged
    assert r.error >= abs(r.energy - exact)


@pytest.mark.parametrize("R", [WORST_CASE, 8.2695, 7.4075, 5.4286])
def test_former_identical_grid_radii(R):
    # regression (see WORST_CASE): tol 1e-12 promises 1e-12 relative (Bessel series reference)
    r = solve_ground_state(FF, R)
    exact = free_fermion_ns_energy(R)
    assert r.converged
    assert abs(r.energy - exact) <= 1e-12 * abs(exact)
    assert r.error >= abs(r.energy - exact)


@pytest.mark.parametrize("R", [40.0, 80.0])
def test_large_radius_absolute(R):
    # Bessel series (docs/physics.md section 2); E ~ e^{-R} is tiny, so an absolute check
    r = solve_ground_state(FF, R)
    exact = free_fermion_ns_energy(R)
    assert r.converged
    assert abs(r.energy - exact) <= 1e-14
    assert abs(r.energy - exact) <= 1e-12 * abs(exact)  # and still relative accuracy
    assert r.error >= abs(r.energy - exact)
    assert r.energy < 0


# --------------------------------------------------------------------------------------
# TTbar-deformed free fermion: E(R, alpha) solves E = E_NS(R + alpha E)
# --------------------------------------------------------------------------------------

ALPHAS = [-0.5, -0.1, 0.1, 0.3]


def _deformed_cases():
    cases = []
    for alpha in ALPHAS:
        radii = [0.05, 0.2, 0.7, 1.0, 3.0, 10.0, 25.0]
        if alpha > 0:
            Rc = deformed_free_fermion_branch(alpha)[1]
            radii += [Rc * 1.01, Rc * 1.1]
        for R in radii:
            # only where a real solution exists (reference: brentq on the flow relation)
            if deformed_free_fermion_energy(R, alpha) is not None:
                cases.append(pytest.param(alpha, R, id=f"a={alpha}-R={R:.4g}"))
    cases.append(pytest.param(0.1, WORST_CASE, id=f"a=0.1-R={WORST_CASE}"))  # regression
    return cases


@pytest.mark.parametrize("alpha, R", _deformed_cases())
def test_deformed_matches_flow_of_exact_series(alpha, R):
    # flow relation E(R, alpha) = E(R + alpha E, 0) (docs/physics.md section 4; Smirnov &
    # Zamolodchikov 2017, Cavaglia et al. 2016, from memory) with the exact series inside
    r = solve_ground_state(FF, R, ttbar(alpha))
    assert r.status is Status.CONVERGED, r.message
    exact = deformed_free_fermion_energy(R, alpha)
    assert abs(r.energy - exact) <= 1e-11 * abs(exact)
    assert r.error >= abs(r.energy - exact)
    # the reported effective radius is R + alpha E (tba/solvers/ground.py docstring of _effective_radius)
    assert r.effective_radius == pytest.approx(R + alpha * exact, rel=1e-13)


def test_deformed_reference_sanity():
    # the reference itself: at the branch point the CFT-like estimate R_c ~ sqrt(2 pi c alpha / 3)
    # holds only roughly (c = 1/2, docs/physics.md section 4), and for alpha < 0 the deformed energy
    # lies above the undeformed one at the same R (alpha E > 0 enlarges the radius).
    for alpha in [0.1, 0.3, 0.5]:
        r_star, Rc = deformed_free_fermion_branch(alpha)
        assert free_fermion_ns_energy_derivative(r_star) == pytest.approx(1 / alpha, rel=1e-10)
        assert 0.8 < Rc / math.sqrt(2 * math.pi * 0.5 * alpha / 3) < 1.2
        assert deformed_free_fermion_energy(Rc * (1 + 1e-6), alpha) is not None
        assert deformed_free_fermion_energy(Rc * (1 - 1e-6), alpha) is None
    assert deformed_free_fermion_energy(1.0, -0.3) > free_fermion_ns_energy(1.0)
    assert deformed_free_fermion_energy(1.0, 0.3) < free_fermion_ns_energy(1.0)


def test_no_real_solution_below_branch_point():
    # alpha = 0.5: R_c = 0.693 from the flow relation (reference), so R = 0.3 has no real
    # solution; the result contract is in tba/result.py (NaN energy, None in the record)
    alpha, R = 0.5, 0.3
    assert R < deformed_free_fermion_branch(alpha)[1]
    r = solve_ground_state(FF, R, ttbar(alpha))
    assert r.status is Status.NO_REAL_SOLUTION
    assert not r.converged
    assert math.isnan(r.energy) and math.isnan(r.error)
    rec = r.as_record()
    assert rec["energy"] is None and rec["error"] is None
    assert rec["status"] == "no-real-solution"
    assert rec["alpha"] == alpha
