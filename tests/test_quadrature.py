"""The quadrature on the solver's own grids against known integrals.

The grid rule (`tba/solvers/grid.py`, docs/physics.md section 8) promises that refinement level
l resolves log(1/tol) + 4 l e-folds, i.e. a relative quadrature error below tol e^(-4 l), and
that the difference of two successive levels exceeds the error of the finer one (the basis of
the error estimate). Both are checked here on the grids `solve_ground_state` would use, with
integrals known in closed form:

* int cosh t e^(-x cosh t) dt = 2 K_1(x) (DLMF 10.32.9, from memory; scipy.special.kn);
* the free-fermion ground state E(R) = -(1/pi) sum_k (-1)^(k+1) K_1(k R) / k
  (docs/physics.md section 2), whose L = log(1 + e^(-R cosh t)) has the singularities at
  |Im t| = pi/2 that set the spacing of every massive model.

For the kernels (E8, nearest pole at pi/30) the band-limited weights of
`tba.solvers.operators` are compared with the convolution computed by composite Gauss-Legendre
quadrature (common practice, no source), next to the trapezoid rule with the same spacing.
"""

import math

import numpy as np
import pytest
from scipy.special import kn

import tba
from tba.models.cdd import NO_DEFORMATION
from tba.solvers.grid import Grid
from tba.solvers.ground import _grid, _solve_on
from tba.solvers.operators import kernel_samples

EPS = np.finfo(float).eps
#: relative rounding floor of a grid sum of up to ~10^3 terms
FLOOR = 64 * EPS
TOLS = (1e-6, 1e-8, 1e-10, 1e-12, 1e-13)
RADII = (0.001, 0.01, 0.1, 0.3, 1.0, 3.0, 5.0, 10.0, 30.0, 100.0)
LEVELS = (0, 1, 2)


def _promised(tol, level):
    """The relative error level ``level`` of the grid rule promises (module docstring)."""
    return max(tol * math.exp(-4 * level), FLOOR)


def _free_fermion_energy(R):
    # docs/physics.md section 2: the K_1 series (absolutely convergent; terms beyond
    # k R ~ 60 are below e^-60 relative)
    k = np.arange(1, int(60 / R) + 50)
    return -float(np.sum((-1.0) ** (k + 1) * kn(1, k * R) / k)) / math.pi


MODELS = {"sinh-gordon": lambda: tba.sinh_gordon(0.6), "lee-yang": tba.lee_yang,
          "ising-e8": tba.ising_e8, "free-fermion": tba.free_fermion}


@pytest.mark.parametrize("name", sorted(MODELS))
def test_driving_term_integral_meets_the_promise_of_each_level(name):
    # sum_a m_a int cosh t e^(-m_a R cosh t) dt = sum_a 2 m_a K_1(m_a R): the energy weight
    # against the leading term of L, on the grids of every species' solve
    model = MODELS[name]()
    masses = np.asarray(model.masses, dtype=float)
    checked = 0
    for tol in TOLS:
        for R in RADII:
            exact = float(np.sum(masses * 2 * kn(1, masses * R)))
            for level in LEVELS:
                grid = _grid(model, NO_DEFORMATION, R, tol, level, 0.0)
                t = grid.t
                integrand = np.cosh(t) * np.exp(-np.outer(masses * R, np.cosh(t)))
                total = float(np.sum(masses * grid.h * np.sum(integrand, axis=1)))
                rel = abs(total - exact) / exact
                assert rel <= _promised(tol, level), (tol, R, level, grid, rel)
                checked += 1
    assert checked == len(TOLS) * len(RADII) * len(LEVELS)


def test_free_fermion_energy_on_the_solver_grids():
    model = tba.free_fermion()
    worst_ratio = 0.0
    for tol in TOLS:
        for R in RADII:
            exact = _free_fermion_energy(R)
            energies = []
            for level in LEVELS:
                grid = _grid(model, NO_DEFORMATION, R, tol, level, 0.0)
                t = grid.t
                L = np.log1p(np.exp(-R * np.cosh(t)))
                E = -(grid.h / (2 * math.pi)) * float(np.sum(np.cosh(t) * L))
                energies.append(E)
                assert abs(E - exact) <= _promised(tol, level) * abs(exact), (tol, R, level, E)
            # the two-grid principle (docs/physics.md section 8): the difference of two levels
            # bounds the error of the finer one (measured: it is at most 0.43 of it)
            for fine, coarse in zip(energies[1:], energies[:-1]):
                ratio = abs(fine - exact) / (abs(fine - coarse) + FLOOR * abs(exact))
                worst_ratio = max(worst_ratio, ratio)
    assert worst_ratio < 1.0


def _gauss_convolution(kernel, g, t0, half_width=12.0, panel=0.01, nodes=16):
    """(1/2pi) int phi(t0 - s) g(s) ds by composite Gauss-Legendre on panels of ``panel``
    (the kernel's poles lie pi/30 ~ 0.1 from the axis: 10 panels per pole distance)."""
    x, w = np.polynomial.legendre.leggauss(nodes)
    edges = np.arange(-half_width, half_width + panel / 2, panel)
    mid, half = 0.5 * (edges[1:] + edges[:-1]), 0.5 * np.diff(edges)
    s = (mid[:, None] + half[:, None] * x[None, :]).ravel()
    ws = (half[:, None] * w[None, :]).ravel()
    return float(np.sum(ws * kernel(t0 - s) * g(s))) / (2 * math.pi)


def test_e8_band_limited_convolution_and_energy_on_the_coarsest_grid():
    # the claim of tba/solvers/operators.py: at R = 1 and tol 1e-13 E8 runs on h ~ 0.27
    # (33 points per species on level 0) although its kernels have poles at pi/30, because
    # the band-limited weights integrate the kernel exactly against the sinc interpolant
    e8 = tba.ising_e8()
    grid0 = _grid(e8, NO_DEFORMATION, 1.0, 1e-13, 0, 0.0)
    grid1 = _grid(e8, NO_DEFORMATION, 1.0, 1e-13, 1, 0.0)
    assert 0.25 <= grid0.h <= 0.3 and grid0.N == 33

    def phi11(t):
        return e8.kernel(np.asarray(t, dtype=float))[0, 0]

    def g(s):
        return np.exp(-2.0 * np.cosh(s))  # analytic, like L for the driving term

    errors = {}
    for label, h in (("level 0", grid0.h), ("level 1", grid1.h), ("fine", 0.025)):
        N = 2 * math.ceil(5.0 / h) + 1
        grid = Grid(h=h, N=N)
        t = grid.t
        band = kernel_samples(e8, grid)[0, 0]
        trap = phi11(h * np.arange(-(N - 1), N)) * (h / (2 * math.pi))
        j = np.arange(N)
        worst_band = worst_trap = 0.0
        for i in np.linspace(0, N - 1, 5).astype(int)[1:-1]:
            exact = _gauss_convolution(phi11, g, t[i])
            worst_band = max(worst_band, abs(float(np.sum(band[N - 1 + i - j] * g(t))) - exact))
            worst_trap = max(worst_trap, abs(float(np.sum(trap[N - 1 + i - j] * g(t))) - exact))
        errors[label] = (worst_band, worst_trap)
    # pointwise, sinc interpolation converges at about half the trapezoid rule's rate:
    # measured 4e-11 at h = 0.27 and 7e-15 at h = 0.19 (max |phi * g| ~ 0.2)
    assert errors["level 0"][0] < 2e-10
    assert errors["level 1"][0] < 1e-13
    # the trapezoid rule sees the poles at pi/30: 2e-3 at h = 0.27, 6e-17 at h = 0.025
    assert errors["level 0"][1] > 1e-4
    assert errors["fine"][1] < 1e-13

    # the energy, an integral of L against cosh t, recovers the full rate: on the level-0 grid
    # alone it is within 1e-13 (relative) of the same equations on a much finer, wider grid
    # (reference solve: common practice, no source)
    def energy(grid):
        state, _ = _solve_on(e8, NO_DEFORMATION, 1.0, grid, 1e-14, None, None)
        return state.energy

    coarse = energy(grid0)
    reference = energy(Grid(h=0.1, N=2 * math.ceil(2 * grid0.cutoff / 0.1) + 1))
    assert abs(coarse - reference) <= 1e-13 * abs(reference), (coarse, reference)
