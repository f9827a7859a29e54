"""The plain TBA script people write today: the baseline of ``bench_scan.py``.

Conventions (the project's, see README.md, Conventions):

    eps_a(t) = m_a R cosh t - sum_b (1/2pi) int phi_ab(t - t') L_b(t') dt',  L = log(1 + e^{-eps})
    phi_ab  -> phi_ab + alpha m_a m_b cosh(t - t')       (CDD factor S -> S exp(+i alpha m_a m_b sinh t))
    E_0(R)   = - sum_a (m_a / 2pi) int cosh t L_a(t) dt   (no bulk term)

Design (honest and competent, no tricks):

* One uniform grid t_i in [-Lambda, Lambda], N points, spacing h = 2 Lambda / (N - 1), trapezoid
  weights h / 2pi (the end points carry e^{-40} and less, so half weights would change nothing).
* The full dense kernel matrix of size (n N) x (n N), built once per scan:
  K[(a,i), (b,j)] = h/2pi * (phi_ab(t_i - t_j) + alpha m_a m_b cosh(t_i - t_j)).
  The TTbar term is a dense matrix like the rest (no separable / rank-2 trick, no FFT).
* Fixed-point iteration eps <- nu - K L(eps) (numpy, one BLAS matrix-vector product per step),
  undamped to begin with; if the change has not shrunk for 3 steps the damping w in
  eps <- (1 - w) eps + w (nu - K L) is halved, and the scan keeps that w for the next radii.
  (Sinh-Gordon converges undamped; for E8 the plain iteration falls into a 2-cycle from the
  driving term and w = 0.5 is what the rule finds, the usual choice for that model.)
  Stop when max |eps_new - eps| < 1e-14 or the relative energy change < 1e-13.
  The change of eps is measured on the dressing K L (eps - nu), which is the same quantity
  without the rounding of the large driving term m R cosh t at the cutoff.
* Warm start: each radius starts from the previous radius's eps (same grid for the whole scan).

Grid choice (the common practice of such scripts, done once per scan, at the smallest radius,
which is the hardest point: the deformation lowers the effective radius R + alpha E_0 and the
plateau of L is widest there):

1. Cutoff: R_eff,min cosh(Lambda) = 40 (m_min = 1), with R_eff,min = R_min + alpha E_0(R_min)
   from a first solve at h = 0.2 on the cutoff R_min cosh(Lambda) = 40.
2. Spacing: h = 0.2, 0.1, 0.05, ... (N - 1 doubles each time) until the energy at R_min changes
   by less than 1e-12 relative between h and h/2. The trapezoid rule converges exponentially
   (error ~ exp(-2 pi d / h)), so that change is the error estimate of the coarser grid h:
   the scan uses the coarser grid of the last pair (the cheaper of the two, both are certified).
   ``GridChoice`` records the chosen N and the N of the confirming grid.

The same iteration compiled with numba (``scan_numba``): the whole fixed-point loop of one
radius in one compiled call, the same matrix, stopping rule, damping rule and warm start; the
matrix-vector product is BLAS through np.dot as in the numpy version. This is what the script
becomes when its author reaches for numba.

Run as a script for a quick look:  python benchmarks/plain_iteration.py
"""

import math
import time
from dataclasses import dataclass, field

import numba
import numpy as np

#: R_eff,min cosh(Lambda) at the cutoff
CUTOFF_EXPONENT = 40.0
#: first spacing of the halving ladder
H_START = 0.2
#: stopping rule of the fixed-point iteration
STEP_TOL = 1e-14
ENERGY_RTOL = 1e-13
MAX_ITER = 100_000


@dataclass
class Grid:
    Lambda: float
    N: int

    @property
    def h(self):
        return 2.0 * self.Lambda / (self.N - 1)

    @property
    def t(self):
        return np.linspace(-self.Lambda, self.Lambda, self.N)


@dataclass
class GridChoice:
    grid: Grid
    r_eff_min: float
    confirm_N: int
    history: list = field(default_factory=list)  # (h, N, E(R_min)) for every grid tried
    damping: float = 1.0
    seconds: float = 0.0


class PlainTBA:
    """The dense discretised equations of one model + TTbar coupling on one grid."""

    def __init__(self, model, alpha, grid):
        self.model, self.alpha, self.grid = model, float(alpha), grid
        m = np.asarray(model.masses, dtype=float)
        n, N = m.size, grid.N
        t, h = grid.t, grid.h
        diff = t[:, None] - t[None, :]                      # t_i - t_j, N x N
        phi = model.kernel(diff)                             # (n, n, N, N)
        phi = phi + self.alpha * np.multiply.outer(np.outer(m, m), np.cosh(diff))
        # rows (a, i), columns (b, j)
        self.K = np.ascontiguousarray(phi.transpose(0, 2, 1, 3).reshape(n * N, n * N)) * (h / (2 * np.pi))
        self.ch = np.outer(m, np.cosh(t)).reshape(-1)        # m_a cosh t_i
        self.wE = -(h / (2 * np.pi)) * self.ch                 # energy weights
        self.n = n

    def energy(self, eps):
        return float(self.wE @ np.log1p(np.exp(-eps)))

    def solve(self, R, eps=None, w=1.0):
        """Fixed-point iteration at radius R from ``eps`` (default: the driving term) with
        damping ``w`` (1 = plain iteration).

        Returns (eps, energy, iterations, w): the damping actually used is handed back so
        that a scan keeps it for the next radius."""
        nu = R * self.ch
        if eps is None:
            eps = nu.copy()
        g = nu - eps                        # the dressing: eps = nu - g
        E = self.energy(eps)
        stalled, last = 0, np.inf
        for it in range(1, MAX_ITER + 1):
            L = np.log1p(np.exp(-eps))
            g_new = self.K @ L
            change = float(np.max(np.abs(g_new - g)))
            g = g_new if w == 1.0 else (1 - w) * g + w * g_new
            eps = nu - g
            E_new = self.energy(eps)
            if w * change < STEP_TOL or abs(E_new - E) < ENERGY_RTOL * abs(E_new):
                return eps, E_new, it, w
            # the change must shrink; if it has not for 3 steps (oscillation, e.g. a
            # 2-cycle, or divergence) halve the damping
            stalled = stalled + 1 if change >= last else 0
            if stalled >= 3:
                w, stalled = 0.5 * w, 0
            last, E = change, E_new
        raise RuntimeError(f"no convergence at R = {R} in {MAX_ITER} iterations")


@numba.njit(cache=True)
def _solve_compiled(K, ch, wE, R, eps, w):
    """`PlainTBA.solve` compiled: returns (eps, energy, iterations, w); iterations -1 if the
    iteration did not converge in MAX_ITER steps. L of the new eps serves the energy and the
    next step."""
    nu = R * ch
    g = nu - eps
    M = eps.size
    L = np.empty(M)
    for i in range(M):
        L[i] = math.log1p(math.exp(-eps[i]))
    E = np.dot(wE, L)
    stalled, last = 0, np.inf
    for it in range(1, MAX_ITER + 1):  # L holds L(eps) of the current eps
        g_new = np.dot(K, L)
        change = np.max(np.abs(g_new - g))
        if w == 1.0:
            g = g_new
        else:
            g = (1 - w) * g + w * g_new
        eps = nu - g
        for i in range(M):
            L[i] = math.log1p(math.exp(-eps[i]))
        E_new = np.dot(wE, L)
        if w * change < STEP_TOL or abs(E_new - E) < ENERGY_RTOL * abs(E_new):
            return eps, E_new, it, w
        stalled = stalled + 1 if change >= last else 0
        if stalled >= 3:
            w, stalled = 0.5 * w, 0
        last, E = change, E_new
    return eps, E, -1, w


def scan_numba(model, alpha, radii, grid, w=1.0):
    """`scan` with the iteration of each radius compiled (`_solve_compiled`); the same returns."""
    t0 = time.perf_counter()
    tba = PlainTBA(model, alpha, grid)
    t1 = time.perf_counter()
    energies, iterations = [], []
    eps = None
    for R in radii:
        eps, E, it, w = _solve_compiled(tba.K, tba.ch, tba.wE, float(R),
                                        R * tba.ch if eps is None else eps, w)
        if it < 0:
            raise RuntimeError(f"no convergence at R = {R} in {MAX_ITER} iterations")
        energies.append(E)
        iterations.append(it)
    t2 = time.perf_counter()
    return np.array(energies), np.array(iterations), t2 - t1, t1 - t0


def cutoff(r_eff):
    return math.acosh(CUTOFF_EXPONENT / r_eff)


def grid_for(Lambda, h):
    return Grid(Lambda, int(round(2 * Lambda / h)) + 1)


def choose_grid(model, alpha, R_min, tol=1e-12, h_start=H_START):
    """The cutoff and spacing for a scan whose smallest radius is ``R_min`` (see module doc).

    Returns a ``GridChoice``; its ``damping`` is the w the iteration settled on."""
    t0 = time.perf_counter()
    m_min = float(np.min(model.masses))
    # effective radius at R_min from a first coarse solve
    first = PlainTBA(model, alpha, grid_for(cutoff(m_min * R_min), h_start))
    _, E0, _, w = first.solve(R_min)
    r_eff = R_min + alpha * E0
    if r_eff <= 0:
        raise ValueError(f"effective radius {r_eff} <= 0 at R = {R_min}")
    Lambda = cutoff(m_min * r_eff)
    history = []
    grid = grid_for(Lambda, h_start)
    _, E_prev, _, w = PlainTBA(model, alpha, grid).solve(R_min, w=w)
    history.append((grid.h, grid.N, E_prev))
    while True:
        fine = Grid(Lambda, 2 * (grid.N - 1) + 1)           # halve the spacing
        _, E, _, w = PlainTBA(model, alpha, fine).solve(R_min, w=w)
        history.append((fine.h, fine.N, E))
        if abs(E - E_prev) < tol * abs(E):
            return GridChoice(grid=grid, r_eff_min=r_eff, confirm_N=fine.N, history=history,
                              damping=w, seconds=time.perf_counter() - t0)
        grid, E_prev = fine, E


def scan(model, alpha, radii, grid, w=1.0):
    """Warm-started scan on one grid, starting with damping ``w``.

    Returns (energies, iterations, seconds for the scan, seconds to build the dense matrix)."""
    t0 = time.perf_counter()
    tba = PlainTBA(model, alpha, grid)
    t1 = time.perf_counter()
    energies, iterations = [], []
    eps = None
    for R in radii:
        eps, E, it, w = tba.solve(R, eps, w)
        energies.append(E)
        iterations.append(it)
    t2 = time.perf_counter()
    return np.array(energies), np.array(iterations), t2 - t1, t1 - t0


if __name__ == "__main__":
    from tba import sinh_gordon

    model, alpha = sinh_gordon(0.6), 0.1
    radii = np.linspace(0.6, 5, 12)
    choice = choose_grid(model, alpha, radii[0])
    print(f"R_eff,min = {choice.r_eff_min:.6f}, Lambda = {choice.grid.Lambda:.4f}, "
          f"N = {choice.grid.N} (h = {choice.grid.h:.4g}), confirmed on N = {choice.confirm_N}, "
          f"damping {choice.damping}, {choice.seconds:.2f} s")
    for h, N, E in choice.history:
        print(f"  h = {h:.5f}  N = {N:5d}  E(R_min) = {E:.16g}")
    E, its, sec, build = scan(model, alpha, radii, choice.grid, choice.damping)
    for R, e, k in zip(radii, E, its):
        print(f"R = {R:8.4f}  E = {e:.16g}  iterations = {k}")
    print(f"{1e3 * sec / len(radii):.3f} ms per point, matrix built in {1e3 * build:.1f} ms")
    E2, its2, sec2, _ = scan_numba(model, alpha, radii, choice.grid, choice.damping)  # compiles
    E2, its2, sec2, _ = scan_numba(model, alpha, radii, choice.grid, choice.damping)
    print(f"numba: {1e3 * sec2 / len(radii):.3f} ms per point, max |E - E_numpy| = "
          f"{np.max(np.abs(E2 - E)):.1e}")
