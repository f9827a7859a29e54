"""Honesty of the Krylov path (GMRES with FFT products) next to the branch point.

Systems above the dense path's size run GMRES; their rounding allowance must be amplified by
the near-singular Jacobian as the dense path's is (docs/physics.md section 4: dE/dR ~ (R -
R_c)^(-1/2) next to the branch point amplifies every error of the discretised equations). E8
(8 species) at alpha = 0.1 is forced onto the Krylov path and solved at R = R_c (1 + d), with
R_c from `tba.branch_point`.

Checks: (1) against an independent reference (common practice, no source): the same equations
on grids forced finer and wider (every level asked for 16 more e-folds, as in
tests/test_fold.py), the estimate must bound the difference; (2) the Krylov rounding
allowance, J^(-T) (L' wE) by GMRES through J0^T, against the same quantity from the dense LU
path on the same grids (an independent linear-algebra route to one number; common practice,
no source): before the fix the Krylov path reported 4 ulps of the sums, 50x below it at
d = 1e-6.
"""

import contextlib

import pytest

import tba
import tba.solvers.grid as grid_rule
import tba.solvers.ground as ground
import tba.solvers.operators as operators

ALPHA = 0.1


@contextlib.contextmanager
def path(krylov, extra_margin=0.0):
    """Force the Krylov path (or the dense one) and optionally finer, wider grids."""
    old_limit, old_margin = operators.DENSE_LIMIT, grid_rule.BASE_MARGIN
    operators.DENSE_LIMIT = 0 if krylov else 10 ** 9
    old_many = operators.MANY_SPECIES_DENSE_LIMIT
    operators.MANY_SPECIES_DENSE_LIMIT = operators.DENSE_LIMIT
    grid_rule.BASE_MARGIN = old_margin + extra_margin
    ground._cached_grid.cache_clear()
    try:
        yield
    finally:
        operators.DENSE_LIMIT, grid_rule.BASE_MARGIN = old_limit, old_margin
        operators.MANY_SPECIES_DENSE_LIMIT = old_many
        ground._cached_grid.cache_clear()


@pytest.fixture(scope="module")
def fold():
    bp = tba.branch_point(tba.ising_e8(), ALPHA)
    assert bp.status == "found"
    return bp.radius


@pytest.fixture(scope="module")
def near(fold):
    """Krylov solve at R_c (1 + 1e-6), tol 5e-12 (where rounding is the largest term; the
    conditioning allows ~8e-13 relative there, so tol 1e-12, which needs twice that, is
    refused or not depending on the BLAS threads' rounding)."""
    radius = fold * (1 + 1e-6)
    with path(krylov=True):
        res = tba.solve(tba.ising_e8(), radius, tba.ttbar(ALPHA), tol=5e-12)
    assert isinstance(res._state.jacobian(), ground.KrylovJacobian)
    return radius, res


def test_krylov_rounding_is_amplified_like_the_dense_adjoint(near):
    radius, res = near
    assert res.status is tba.Status.CONVERGED, res.message
    fine = res._state
    with path(krylov=False):  # the dense path on the same grid, started from this solution
        dense, _ = ground._solve_on(tba.ising_e8(), tba.ttbar(ALPHA), radius, fine.grid, 1e-12,
                                    fine, None)
    assert dense is not None and dense.rounding_error == dense.rounding_error
    # one solution of the same equations: the two agree within their iteration and rounding
    # allowances
    assert abs(dense.energy - fine.energy) <= (dense.iteration_error + dense.rounding_error
                                               + fine.iteration_error + fine.rounding_error)
    ratio = fine.rounding_error / dense.rounding_error
    assert 0.8 < ratio < 1.25, ratio
    # and it is amplified: far above 4 ulps of the energy sum
    assert res._state.rounding_error > 100 * 2.2e-16 * abs(res.energy)


@pytest.mark.parametrize("d", [1e-6, 1e-8])
def test_krylov_estimate_bounds_the_error_next_to_the_fold(fold, d):
    radius = fold * (1 + d)
    with path(krylov=True):
        res = tba.solve(tba.ising_e8(), radius, tba.ttbar(ALPHA), tol=1e-10)
    assert res.status is tba.Status.CONVERGED, res.message
    assert isinstance(res._state.jacobian(), ground.KrylovJacobian)
    with path(krylov=False, extra_margin=16.0):
        ref = tba.solve(tba.ising_e8(), radius, tba.ttbar(ALPHA), tol=1e-11)
    assert ref.status is tba.Status.CONVERGED, ref.message
    assert ref.grid.h < res.grid.h
    assert abs(res.energy - ref.energy) <= res.error, (res.energy, ref.energy, res.error)
