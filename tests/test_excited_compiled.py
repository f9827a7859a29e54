"""The compiled excited-state iteration (kernels.excited) against the numpy one it replaces,
and the LU factorisation it calls (kernels.lapack) against scipy's."""

import numpy as np
import pytest
import scipy.linalg

from kernels import lapack
from tba import free_fermion, sinh_gordon, ttbar
from tba.models.cdd import CDD
from tba.solvers import excited

# Each case takes a path of its own through the equations: no near poles (B = 0.6), poles on
# the axis (B = 1, a = 0), poles near it (B = 0.9, a = 0.16) and very near (B = 0.995,
# a = 0.008: the expanded smooth part), the free fermion (no blocks; sigma = -1 for an odd
# number of particles), TTbar of both signs, spin-3 and spin-5 CDD terms (the last: no real
# solution, a status both paths must agree on).
CASES = [
    (sinh_gordon(0.6), None, 1.0, "1/2,-1/2"),
    (sinh_gordon(0.6), ttbar(0.1), 1.0, "1/2,3/2"),
    (sinh_gordon(1.0), None, 0.7, "0"),
    (sinh_gordon(1.0), ttbar(-0.05), 2.0, "-1/2,1/2"),
    (sinh_gordon(0.995), None, 1.0, "-1/2,1/2"),
    (sinh_gordon(0.9), ttbar(0.05), 1.5, "0"),
    (free_fermion(), ttbar(0.1), 1.0, "1/2,-1/2"),
    (free_fermion(), None, 0.8, "-1,0,1"),
    (sinh_gordon(0.6), CDD({3: -1e-3}), 1.0, "1/2,-1/2"),
    (sinh_gordon(0.6), CDD({1: 0.05, 5: 1e-4}), 1.0, "0"),
]


def _both(monkeypatch, model, deformation, R, state):
    out = []
    for compiled in (True, False):
        monkeypatch.setattr(excited, "COMPILED", compiled)
        res = excited.solve_excited(model, R, state, deformation)
        d = excited.excited_derivatives(res, spins=(1, 3)) if res.converged else None
        out.append((res, d))
    return out


@pytest.mark.parametrize("model, deformation, R, state", CASES,
                         ids=[f"{m.name}-{m.coupling}-{d}-{R}-{s}" for m, d, R, s in CASES])
def test_the_compiled_iteration_solves_as_the_numpy_one(monkeypatch, model, deformation, R, state):
    # the numpy iteration is the reference (common practice, no source): the same statuses, the
    # same Newton steps, energies and derivatives within a few units of rounding
    (a, da), (b, db) = _both(monkeypatch, model, deformation, R, state)
    assert a.status is b.status
    assert a.iterations == b.iterations
    if not a.converged:
        return
    assert abs(a.energy - b.energy) <= 4e-15 * abs(b.energy)
    assert abs(a.momentum - b.momentum) <= 4e-15 * max(abs(b.energy), 1.0)
    assert np.allclose(a.rapidities, b.rapidities, rtol=1e-13, atol=1e-14)
    scale = np.max(np.abs(b.pseudo_energies))
    assert np.max(np.abs(a.pseudo_energies - b.pseudo_energies)) <= 1e-12 * scale
    assert a.error == pytest.approx(b.error, rel=0.5)  # differences of close numbers
    for key in ("dE_dR", "dE_dalpha1", "dE_dalpha3"):
        assert da[key] == pytest.approx(db[key], rel=1e-13, abs=1e-14)
    fa, fb = a._state, b._state
    assert fa.det_sign == fb.det_sign
    assert fa.jac_scale == pytest.approx(fb.jac_scale, rel=1e-10)
    assert fa.dE_dR == pytest.approx(fb.dE_dR, rel=1e-13, abs=1e-14)


def test_one_newton_call_reports_the_same_failures(monkeypatch):
    # a start outside the domain of L (free fermion, odd N: L = log(1 - e^-eps) needs eps > 0)
    # and a particle far out (t = 300) that three steps cannot bring back: the same message
    # and step count on both paths
    model = free_fermion()
    none = excited.NO_DEFORMATION
    eqs = excited.ExcitedEquations(model, none, 1.0, excited._grid(model, none, (1.0, 0.0), 1e-12, 0),
                                   excited.parse_state("0"))
    guess = eqs.initial_guess(np.array([0.0]))
    for start, t, message in ((-np.ones(eqs.N), 0.0, "initial guess outside the domain of L"),
                              (guess, 300.0, "no convergence in 3 Newton steps")):
        got = []
        for compiled in (True, False):
            monkeypatch.setattr(excited, "COMPILED", compiled)
            got.append(excited._newton(eqs, start, np.array([t]), 1e-12, maxiter=3))
        assert got[0] == got[1] == (None, message, 0 if t == 0.0 else 3)


@pytest.mark.parametrize("n", [1, 2, 7, 40, 131])
@pytest.mark.parametrize("factor", [lapack.lu_factor, lapack.lu_loops], ids=["lapack", "loops"])
def test_lu_factor_gives_scipys_factors_and_solves(n, factor):
    # scipy.linalg.lu_factor / lu_solve (LAPACK dgetrf / dgetrs) are the reference
    rng = np.random.default_rng(n)
    A = rng.standard_normal((n, n))
    b = rng.standard_normal(n)
    lu, piv = scipy.linalg.lu_factor(A)
    at = np.ascontiguousarray(A.T)
    ipiv = np.zeros(n, dtype=lapack.PIVOT_TYPE)
    assert factor(at, ipiv) == 0
    assert np.array_equal(ipiv - 1, piv)
    assert np.allclose(at.T, lu, rtol=0, atol=1e-12 * n)
    x = lapack.lu_solve(at, ipiv, b.copy())
    assert np.allclose(x, scipy.linalg.lu_solve((lu, piv), b), rtol=1e-10, atol=1e-12)
    sign, ratio = lapack.pivot_summary(at, ipiv)
    assert sign == np.sign(np.linalg.det(A))
    d = np.abs(np.diag(lu))
    assert ratio == pytest.approx(d.min() / d.max(), rel=1e-12)


def test_an_exactly_singular_matrix_is_reported_by_its_first_zero_pivot():
    # LAPACK's convention (info = index of the first zero pivot, 1-based)
    A = np.array([[1.0, 2.0, 3.0], [2.0, 4.0, 6.0], [0.0, 0.0, 1.0]])
    for factor in (lapack.lu_factor, lapack.lu_loops):
        at = np.ascontiguousarray(A.T)
        ipiv = np.zeros(3, dtype=lapack.PIVOT_TYPE)
        assert factor(at, ipiv) == 2
        assert lapack.pivot_summary(at, ipiv)[0] == 0.0
        assert not np.all(np.isfinite(lapack.lu_solve(at, ipiv, np.ones(3))))
