"""Newton solver for the ground-state TBA of a diagonal model with CDD deformations.

The discretised equations on a uniform grid t_i (trapezoid rule, weights h) are

    F_a(i) = eps_a(i) - m_a R cosh t_i + sum_b sum_j K_ab(i - j) L_b(j)
             + sum_r c_r u_r,a(i) sum_b sum_j v_r,b(j) L_b(j)  = 0

with K_ab(k) = h phi_ab(k h) / 2 pi and, for every CDD spin s, two rank-one terms
(cosh and sinh parts of cosh(s(t - t'))). Newton's method with a backtracking line
search solves them; the Jacobian

    J = 1 + K diag(L') + sum_r c_r u_r (v_r L')^T

is factorised densely when the system is small and applied through FFTs inside GMRES
when it is large (the crossover was measured, see ``DENSE_LIMIT``).

Every point is solved on two grids of increasing resolution (``tba.solvers.grid``); the
difference of their energies, plus the Newton and rounding contributions, is the
error estimate. More levels are added until the estimate meets the tolerance.

Real solutions stop existing at a fold (square-root branch point). Along the branch
connected to the undeformed theory the determinant of the small "capacitance" matrix
of the rank-one terms, ``fold_indicator``, is positive and vanishes at the fold. When
Newton fails for a deformed point, the deformation is switched on gradually from 0 at
fixed R; if that continuation ends at a fold before the requested coupling, the point
has no real solution and is reported as such.
"""

import math
import numbers
import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import scipy.sparse.linalg

from kernels import SpectralConvolver, block_toeplitz_matrix, occupation_terms
from kernels import newton as _dense
from tba.models.cdd import CDD, NO_DEFORMATION
from tba.solvers.grid import Grid, choose_grid
from tba.solvers.result import SolveResult, Status

#: systems with n_species * N at or below this are factorised densely (measured crossover)
DENSE_LIMIT = 1200
#: refinement levels tried before a point is declared not converged
MAX_LEVEL = 4
_EPS = np.finfo(float).eps
#: the smallest relative tolerance offered: a few hundred ulps, where the rounding allowance
#: of a grid sum of ~10^3 terms still fits
MIN_TOL = 1e-13


class _Operators:
    """Kernel samples and the convolution operator for one model on one grid (cached)."""

    def __init__(self, model, grid):
        n, N = model.n_species, grid.N
        offsets = grid.h * np.arange(-(N - 1), N)
        kern = np.ascontiguousarray(model.kernel(offsets) * (grid.h / (2 * np.pi)))
        self.n, self.N = n, N
        self.trivial = not np.any(kern)
        self.dense = n * N <= DENSE_LIMIT
        if self.trivial:
            self.matrix = None
        elif self.dense:
            self.matrix = block_toeplitz_matrix(kern, N)
        else:
            self._spectral = SpectralConvolver(kern)
        # grid-dependent arrays shared by every Discretization on this grid
        t, h, m = grid.t, grid.h, model.masses
        self.model, self.grid = model, grid
        self.drive = np.outer(m, np.cosh(t))
        self.wE = -(h / (2 * np.pi)) * self.drive
        self.wP = -(h / (2 * np.pi)) * np.outer(m, np.sinh(t))
        self.no_terms = np.zeros((0, n, N))
        self._spin = {}

    def separable(self, deformation, spin):
        """(U, V, c) of the two rank-one terms of a spin-s CDD factor: kernel
        coefficient q_a q_b (cosh(st) cosh(st') - sinh(st) sinh(st'))."""
        alpha = deformation.couplings[spin]
        q = deformation.charges(self.model, spin)
        key = (spin, tuple(q))
        UV = self._spin.get(key)
        if UV is None:
            t, h = self.grid.t, self.grid.h
            ch, sh = np.cosh(spin * t), np.sinh(spin * t)
            U = np.stack([np.outer(q, ch), np.outer(q, sh)])
            UV = self._spin[key] = (U, h * U)
        coef = alpha * spin / (2 * np.pi)
        return UV[0], UV[1], np.array([coef, -coef])

    def convolve(self, f):
        if self.trivial:
            return np.zeros_like(f)
        if self.dense:
            return (self.matrix @ f.reshape(-1)).reshape(f.shape)
        return self._spectral(f)


def _operators(model, grid):
    cache = model._kernel_cache
    key = (grid.h, grid.N)
    ops = cache.get(key)
    if ops is None:
        if len(cache) > 64:
            cache.clear()
        ops = cache[key] = _Operators(model, grid)
    return ops


class Discretization:
    """The ground-state equations of ``model`` deformed by ``deformation`` at radius R on ``grid``."""

    def __init__(self, model, deformation, radius, grid):
        self.model, self.deformation, self.radius, self.grid = model, deformation, radius, grid
        ops = self.ops = _operators(model, grid)
        self.shape = (model.n_species, grid.N)
        self.nu = radius * ops.drive
        terms = [ops.separable(deformation, s) for s in deformation.couplings]
        self.U = np.concatenate([u for u, v, c in terms]) if terms else ops.no_terms
        self.V = np.concatenate([v for u, v, c in terms]) if terms else ops.no_terms
        self.c = np.concatenate([c for u, v, c in terms]) if terms else np.zeros(0)
        self.wE, self.wP = ops.wE, ops.wP
        self.sign = 1 if model.statistics == "fermion" else -1

    # -- the equations -------------------------------------------------------------------
    def occupation(self, e):
        L = np.empty(self.shape)
        dL = np.empty(self.shape)
        bad = occupation_terms(np.ascontiguousarray(e), self.sign, L, dL)
        return L, dL, bad == 0

    def separable(self, L):
        """(scalars S_r = v_r . L, the rank-one terms sum_r c_r S_r u_r)."""
        S = np.einsum("rij,ij->r", self.V, L)
        return S, np.einsum("r,rij->ij", self.c * S, self.U)

    def dressing(self, L):
        """-(K * L): the part of eps that comes from the model's own kernel."""
        return -self.ops.convolve(L)

    def residual(self, e, L):
        return e - self.nu - self.dressing(L) + self.separable(L)[1]

    def energy(self, L):
        return float(np.sum(self.wE * L))

    def coupling_derivative(self, L, spin):
        """dF/dalpha_s at fixed eps: (s / 2pi) q_a [cosh(s t) C - sinh(s t) S], with
        C, S = sum_b q_b int {cosh, sinh}(s t') L_b(t') dt'. Works whether or not the
        deformation contains this spin (derivatives at alpha_s = 0)."""
        t, h = self.grid.t, self.grid.h
        q = self.deformation.charges(self.model, spin)
        ch, sh = np.cosh(spin * t), np.sinh(spin * t)
        C = h * float(q @ L @ ch)
        S = h * float(q @ L @ sh)
        return (spin / (2 * np.pi)) * np.outer(q, C * ch - S * sh)

    # -- the Jacobian --------------------------------------------------------------------
    def jacobian(self, dL):
        return _Jacobian(self, dL)

    def initial_guess(self, state=None):
        """eps on this grid from a solved neighbour (any grid, radius, coupling), or the driving term."""
        if state is None:
            return self.nu.copy()
        if state.grid == self.grid:
            g = state.dressing
        else:
            g = _interpolate(state.grid, state.dressing, self.grid.t)
        e = self.nu + g
        if self.c.size and state.scalars.size == self.c.size:
            e -= np.einsum("r,rij->ij", self.c * state.scalars, self.U)
        return e


def _interpolate(grid, values, t):
    """Cubic (4-point Lagrange) interpolation of values on ``grid`` at ``t``; 0 outside the grid."""
    x = (t - grid.t[0]) / grid.h
    i = np.clip(np.floor(x).astype(int) - 1, 0, grid.N - 4)
    u = x - i
    w = np.stack([-(u - 1) * (u - 2) * (u - 3) / 6, u * (u - 2) * (u - 3) / 2,
                  -u * (u - 1) * (u - 3) / 2, u * (u - 1) * (u - 2) / 6])
    out = sum(w[k] * values[:, i + k] for k in range(4))
    out[:, (x < 0) | (x > grid.N - 1)] = 0.0
    return out


class _Jacobian:
    """J = J0 + U C (V L')^T with J0 = 1 + K diag(L') (the undeformed Jacobian).

    Dense route: J0 is LU-factorised and J is solved with the Woodbury formula, so the
    r x r capacitance matrix cap = 1 + C (V L')^T J0^{-1} U comes for free; its
    determinant (the fold indicator) is 1 without deformation and 0 at a fold, while J0
    stays well conditioned there. Krylov route: GMRES on J for Newton steps, and on the
    well-conditioned J0 for the fold indicator.
    """

    def __init__(self, disc, dL):
        self.disc = disc
        self.dL = dL
        n, N = disc.shape
        self.size = n * N
        r = disc.c.size
        self.CVd = disc.c[:, None] * (disc.V * dL).reshape(r, n * N)
        self.Uf = disc.U.reshape(r, n * N)
        self._cap = self._Z = None
        self._cap_rtol = np.inf
        if disc.ops.dense:
            J0 = np.eye(self.size)
            if not disc.ops.trivial:
                J0 += disc.ops.matrix * dL.reshape(1, -1)
            self._lu = scipy.linalg.lu_factor(J0, check_finite=False)
            if r:
                # one right-hand side at a time: multi-column triangular solves are much
                # slower for these sizes with some BLAS builds (measured: 5 ms vs 20 us)
                self._capacitance()
        else:
            shape = (self.size, self.size)
            self._op = scipy.sparse.linalg.LinearOperator(shape, matvec=self.matvec, dtype=float)
            self._op0 = scipy.sparse.linalg.LinearOperator(shape, matvec=self._matvec0, dtype=float)

    def _matvec0(self, x):
        x = np.asarray(x).reshape(self.disc.shape)
        return (x + self.disc.ops.convolve(self.dL * x)).reshape(-1)

    def matvec(self, x):
        y = self._matvec0(x)
        if self.CVd.size:
            y += (self.CVd @ np.asarray(x).reshape(-1)) @ self.Uf
        return y

    @staticmethod
    def _gmres(op, b, rtol, maxiter=20):
        x, info = scipy.sparse.linalg.gmres(op, b, rtol=rtol, atol=0.0, restart=60, maxiter=maxiter)
        if info != 0:
            raise np.linalg.LinAlgError(f"GMRES did not converge (info={info})")
        return x

    def solve(self, rhs, rtol=1e-13):
        b = rhs.reshape(-1)
        if not self.disc.ops.dense:
            try:  # GMRES on J converges in a few dozen steps away from folds
                return self._gmres(self._op, b, rtol, maxiter=2).reshape(self.disc.shape)
            except np.linalg.LinAlgError:
                if self.disc.c.size == 0:
                    raise
            # near a fold J is ill conditioned: Woodbury with the well-conditioned J0
            Z, cap = self._capacitance(rtol=1e-13)
            y = self.solve0(b, rtol)
            return (y - Z @ np.linalg.solve(cap, self.CVd @ y)).reshape(self.disc.shape)
        y = scipy.linalg.lu_solve(self._lu, b, check_finite=False)
        if self._cap is not None:
            y = y - self._Z @ np.linalg.solve(self._cap, self.CVd @ y)
        return y.reshape(self.disc.shape)

    def solve0(self, b, rtol=1e-13):
        """J0^{-1} b for a flat vector b (the undeformed Jacobian: well conditioned at folds)."""
        if self.disc.ops.dense:
            return scipy.linalg.lu_solve(self._lu, b, check_finite=False)
        return self._gmres(self._op0, b, rtol)

    def _capacitance(self, rtol=1e-10):
        """(Z = J0^{-1} U^T, cap = 1 + C (V L')^T Z). With GMRES, 1e-10 is plenty for the fold
        indicator (a sign and a size); solves near a fold ask for more and get it."""
        if self._cap is None or rtol < self._cap_rtol:
            r = self.disc.c.size
            self._Z = np.stack([self.solve0(self.Uf[k], rtol) for k in range(r)], axis=1)
            self._cap = np.eye(r) + self.CVd @ self._Z
            self._cap_rtol = 0.0 if self.disc.ops.dense else rtol
        return self._Z, self._cap

    def fold_indicator(self):
        """det(1 + C (V L')^T J0^{-1} U) = det J / det J0: 1 undeformed, 0 at a fold."""
        if self.disc.c.size == 0:
            return 1.0
        return float(np.linalg.det(self._capacitance()[1]))

    def bordered_solve(self, f, p, q, a1, a2):
        """Solve [[J, f], [p^T, q]] [x; y] = [a1; a2] (f, p, a1 of the equations' shape).

        J is handled as J0 + U^T W with the Woodbury formula, so the bordered matrix may be
        regular while J itself is singular (at a fold): only J0 is ever inverted.
        """
        f, p, a1 = f.reshape(-1), p.reshape(-1), a1.reshape(-1)
        r = self.disc.c.size
        ya, zf = self.solve0(a1), self.solve0(f)
        if r:
            Z, _ = self._capacitance()
            W = self.CVd
            M = np.zeros((r + 1, r + 1))
            M[:r, :r] = np.eye(r) + W @ Z
            M[:r, r] = W @ zf
            M[r, :r] = -(p @ Z)
            M[r, r] = q - p @ zf
            rhs = np.concatenate([W @ ya, [a2 - p @ ya]])
            sol = np.linalg.solve(M, rhs)
            w, y = sol[:r], sol[r]
            x = ya - Z @ w - zf * y
        else:
            y = (a2 - p @ ya) / (q - p @ zf)
            x = ya - zf * y
        return x.reshape(self.disc.shape), float(y)


@dataclass
class State:
    """A solved point on one grid: enough to warm-start a neighbour or take derivatives."""

    grid: Grid
    radius: float
    deformation: CDD
    eps: np.ndarray
    dressing: np.ndarray
    scalars: np.ndarray
    energy: float
    momentum: float
    iteration_error: float
    rounding_error: float
    tail_error: float
    fold_indicator: float
    residual: float
    iterations: int
    disc: object = field(default=None, repr=False)
    jac: object = field(default=None, repr=False)
    L: np.ndarray = field(default=None, repr=False)
    dL: np.ndarray = field(default=None, repr=False)
    coarse: object = field(default=None, repr=False)

    def derivatives(self, spins=(1,), second=False):
        """Exact dE/dR, dE/dalpha_s (and d2E/dR2) on this grid from the linearised equations
        J de/dx = -dF/dx with the Newton Jacobian."""
        if self.jac is None:
            self.jac = self.disc.jacobian(self.dL)
        disc, jac = self.disc, self.jac
        out = {}
        de = jac.solve(disc.nu / disc.radius, rtol=1e-13)  # dF/dR = -nu / R
        out["dE_dR"] = float(np.sum(disc.wE * self.dL * de))
        if second:
            # d/dR of J e' + F_R = 0: J e'' = -(K + separable)(L'' e'^2), F_R has no eps in it
            d2L = -self.dL * (1.0 + self.dL) if disc.sign > 0 else -self.dL * (self.dL - 1.0)
            X = d2L * de * de
            d2e = jac.solve(-(disc.ops.convolve(X) + disc.separable(X)[1]), rtol=1e-13)
            out["d2E_dR2"] = float(np.sum(disc.wE * (self.dL * d2e + X)))
        for spin in spins:
            de = jac.solve(-disc.coupling_derivative(self.L, spin), rtol=1e-13)
            out[f"dE_dalpha{spin}"] = float(np.sum(disc.wE * self.dL * de))
        return out


@dataclass
class _Newton:
    ok: bool
    e: np.ndarray
    L: np.ndarray
    dL: np.ndarray
    iterations: int
    residual: float
    last_dE: float
    message: str
    jac: object = None
    disc: object = field(default=None, repr=False)
    fold: float = None

    def jacobian(self):
        if self.jac is None:
            self.jac = self.disc.jacobian(self.dL)
        return self.jac

    @property
    def fold_indicator(self):
        if self.fold is None:
            self.fold = self.jacobian().fold_indicator()
        return self.fold


_DENSE_MESSAGES = {
    _dense.CONVERGED: "converged",
    _dense.MAX_ITERATIONS: "no convergence in {maxiter} Newton steps",
    _dense.LINE_SEARCH_FAILED: "line search failed",
    _dense.OUTSIDE_DOMAIN: "initial guess outside the domain of L",
    _dense.SINGULAR: "linear solve failed: singular Jacobian",
}


def _newton_dense(disc, e, tol, maxiter):
    """The compiled dense Newton iteration (kernels.newton) on the flattened equations."""
    ops = disc.ops
    M = e.size
    K = ops.matrix if not ops.trivial else np.zeros((1, 1))
    r = disc.c.size
    e_, L, dL, it, res, dE, status, fold = _dense.dense_newton(
        K, disc.nu.reshape(-1), disc.U.reshape(r, M), disc.V.reshape(r, M), disc.c,
        disc.wE.reshape(-1), np.ascontiguousarray(e, dtype=float).reshape(-1), disc.sign,
        float(tol), maxiter, ops.trivial)
    shape = disc.shape
    return _Newton(status == _dense.CONVERGED, e_.reshape(shape), L.reshape(shape),
                   dL.reshape(shape), int(it), float(res), float(dE),
                   _DENSE_MESSAGES[status].format(maxiter=maxiter), disc=disc,
                   fold=float(fold) if status == _dense.CONVERGED else None)


def newton(disc, e, tol, maxiter=60):
    """Newton's method with backtracking on the discretised equations, from ``e``.

    Each step first solves for the Newton correction delta. When the energy change it
    would make, |dE/deps . delta|, is below ``tol |E| / 100`` and delta is small (the
    quadratic regime), the current point is returned without the step and that change
    is its iteration error: an estimate of the distance to the exact discrete solution
    that needs no extra solve. Dense systems run the same iteration compiled
    (`kernels.newton.dense_newton`).
    """
    if disc.ops.dense:
        return _newton_dense(disc, e, tol, maxiter)
    L, dL, ok = disc.occupation(e)
    if not ok:
        return _Newton(False, e, L, dL, 0, np.inf, np.inf, "initial guess outside the domain of L")
    F = disc.residual(e, L)
    r = float(np.max(np.abs(F)))
    floor = 64 * _EPS * max(1.0, float(np.max(np.abs(disc.nu))))
    dE = np.inf
    for it in range(maxiter + 1):
        try:
            jac = disc.jacobian(dL)
            delta = jac.solve(-F, rtol=min(1e-3, max(1e-13, 1e-2 * r)))
        except (np.linalg.LinAlgError, ValueError) as exc:
            return _Newton(False, e, L, dL, it, r, dE, f"linear solve failed: {exc}")
        dE = abs(float(np.sum(disc.wE * dL * delta)))
        small = float(np.max(np.abs(delta))) < 1e-6 or r <= floor
        if small and dE <= max(1e-2 * tol, 8 * _EPS) * abs(disc.energy(L)):
            return _Newton(True, e, L, dL, it, r, dE, "converged", jac, disc)
        if it == maxiter:
            break
        lam = 1.0
        while True:
            e_new = e + lam * delta
            L_new, dL_new, ok = disc.occupation(e_new)
            if ok:
                F_new = disc.residual(e_new, L_new)
                r_new = float(np.max(np.abs(F_new)))
                if r_new <= (1 - 0.25 * lam) * r or r_new <= floor:
                    break
            lam *= 0.5
            if lam < 1e-4:
                if r <= 1e3 * floor:  # at rounding level already: stagnation is convergence
                    return _Newton(True, e, L, dL, it, r, dE, "converged (rounding level)", jac,
                                   disc)
                return _Newton(False, e, L, dL, it, r, dE, "line search failed")
        e, L, dL, F, r = e_new, L_new, dL_new, F_new, r_new
    return _Newton(False, e, L, dL, maxiter, r, dE, f"no convergence in {maxiter} Newton steps")


def _state(disc, nt, fold=None):
    L = nt.L
    S, _ = disc.separable(L)
    E = disc.energy(L)
    # rounding: every term of E and of eps carries a relative error of a few ulps
    rounding = 4 * _EPS * (np.sum(np.abs(disc.wE * L)) + np.sum(np.abs(disc.wE * nt.dL * nt.e)))
    # tails beyond the cutoff: int_Lambda^inf cosh t e^{-eps} dt ~ cosh(Lambda) L(Lambda) / eps'(Lambda)
    edge = np.abs(disc.wE[:, [0, -1]] * L[:, [0, -1]]) / disc.grid.h
    slope = np.maximum(np.abs(nt.e[:, [0, -1]] - nt.e[:, [1, -2]]) / disc.grid.h, 1e-300)
    tail = float(np.sum(edge / slope))
    if fold is None:
        fold = nt.fold_indicator
    return State(grid=disc.grid, radius=disc.radius, deformation=disc.deformation, eps=nt.e,
                 dressing=disc.dressing(L), scalars=S, energy=E,
                 momentum=float(np.sum(disc.wP * L)), iteration_error=nt.last_dE,
                 rounding_error=float(rounding), tail_error=tail, fold_indicator=float(fold),
                 residual=nt.residual, iterations=nt.iterations, disc=disc, jac=nt.jac, L=L,
                 dL=nt.dL)


def _continue_deformation(model, deformation, radius, grid, tol, start=None):
    """Switch the deformation on in steps lambda: 0 -> 1 at fixed R, staying on the branch of
    the undeformed theory. Returns (newton outcome or None, message, lambda_fold_estimate)."""
    disc0 = Discretization(model, NO_DEFORMATION, radius, grid)
    nt = newton(disc0, disc0.initial_guess(start), tol)
    iterations = nt.iterations
    if not nt.ok:
        return None, f"undeformed equations: {nt.message}", None, iterations
    lam, step = 0.0, 0.25
    history = [(0.0, 1.0)]
    e = nt.e
    while lam < 1.0:
        trial = min(1.0, lam + step)
        disc = Discretization(model, deformation.scaled(trial), radius, grid)
        out = newton(disc, e, tol, maxiter=20)  # from a close neighbour: a few steps, or a fold
        iterations += out.iterations
        d = out.fold_indicator if out.ok else np.nan
        if out.ok and d > 0:
            lam, e, nt = trial, out.e, out
            history.append((lam, d))
            step = min(2 * step, 1.0)
            if lam == 1.0:
                return nt, "converged", None, iterations
            continue
        step *= 0.5
        fold = _fold_estimate(history)
        # a fold well before the requested coupling settles it; near lambda = 1 keep
        # refining, the requested point may lie just before the fold
        if step < 1e-9 or (step < 1e-3 and fold is not None and fold < 1.0 - 50 * step):
            break
    fold = _fold_estimate(history)
    d2 = history[-1][1]
    return (None, f"continuation stopped at {lam:.12g} of the coupling (fold indicator {d2:.3g})",
            fold, iterations)


def _fold_estimate(history):
    """Where the fold indicator d vanishes, from its last two values: near a fold d^2 is
    linear in the coupling (square-root branch point)."""
    if len(history) < 2:
        return None
    (l1, d1), (l2, d2) = history[-2], history[-1]
    slope = (d2 * d2 - d1 * d1) / (l2 - l1)
    return l2 - d2 * d2 / slope if slope < 0 else None


def _validate(radius, tol):
    if isinstance(radius, bool) or not isinstance(radius, numbers.Real):
        raise TypeError(f"radius must be a real number, got {radius!r}")
    radius = float(radius)
    if not (math.isfinite(radius) and radius > 0):
        raise ValueError(f"radius must be finite and positive, got {radius!r}")
    if isinstance(tol, bool) or not isinstance(tol, numbers.Real):
        raise TypeError(f"tol must be a real number, got {tol!r}")
    tol = float(tol)
    if not (math.isfinite(tol) and MIN_TOL <= tol < 1e-2):
        raise ValueError(f"tol must lie in [{MIN_TOL:g}, 1e-2), got {tol!r}")
    return radius, tol


def solve_ground_state(model, radius, deformation=None, *, tol=1e-12, start=None):
    """Ground-state energy E_0(R) of ``model`` deformed by ``deformation``.

    Parameters
    ----------
    model : DiagonalModel
    radius : float
        Circumference R > 0 in units of the lightest mass.
    deformation : CDD, optional
        Default: undeformed.
    tol : float
        Requested relative accuracy of the energy; the returned ``error`` estimates the
        actual error and is meant to bound it.
    start : SolveResult, optional
        A solved neighbour (other radius or coupling) to start Newton from.

    Returns
    -------
    SolveResult
        status CONVERGED, NO_REAL_SOLUTION (a fold lies between the undeformed theory and
        the requested coupling at this R) or NOT_CONVERGED; energy and error are NaN
        unless converged.
    """
    radius, tol = _validate(radius, tol)
    deformation = NO_DEFORMATION if deformation is None else deformation
    if not isinstance(deformation, CDD):
        raise TypeError(f"deformation must be a CDD, got {type(deformation).__name__}")
    t0 = time.perf_counter()
    base = dict(model=model.name, radius=radius, couplings=dict(deformation.couplings),
                coupling=model.coupling)
    prev_state = start._state if isinstance(start, SolveResult) and start.converged else None
    r_eff = prev_state and _effective_radius(prev_state, radius, deformation)
    r_eff = r_eff if r_eff and r_eff > 0 else radius
    min_mass = float(np.min(model.masses))
    states = []
    iterations = 0
    level, cutoff_extra = 0, 0.0
    seed = prev_state
    while True:
        grid = choose_grid(model.pole_distance, min_mass, r_eff, tol, level, cutoff_extra,
                           max_spin=max(deformation.couplings, default=1))
        disc = Discretization(model, deformation, radius, grid)
        nt = newton(disc, disc.initial_guess(seed), tol)
        iterations += nt.iterations
        if deformation.is_zero:
            fold = 1.0
        elif states and nt.ok:
            fold = states[-1].fold_indicator  # same branch as the coarser level: checked there
        else:
            fold = nt.fold_indicator if nt.ok else np.nan
        if not (nt.ok and fold > 0) and not deformation.is_zero:
            nt, message, lam_fold, its = _continue_deformation(model, deformation, radius, grid,
                                                               tol, seed)
            iterations += its
            if nt is None:
                if lam_fold is not None and lam_fold < 1.0:
                    return SolveResult(**base, status=Status.NO_REAL_SOLUTION, iterations=iterations,
                                       message=f"no real solution: the branch of the undeformed "
                                               f"theory folds at about {lam_fold:.6g} times the "
                                               f"requested couplings ({message})")
                return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                   message=message)
            fold = nt.fold_indicator
        if not nt.ok:
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                               message=nt.message)
        state = _state(disc, nt, fold)
        scale = abs(state.energy)
        if state.tail_error > 1e-3 * tol * scale and cutoff_extra < 60:
            cutoff_extra += 4 + math.log(state.tail_error / (1e-3 * tol * scale))
            seed = state
            continue
        state.coarse = states[-1] if states else None
        if state.coarse is not None:
            state.coarse.coarse = None  # keep two levels: enough for derivative errors
        states.append(state)
        seed = state
        r_eff = _effective_radius(state, radius, deformation) or r_eff
        if len(states) >= 2:
            fine, coarse = states[-1], states[-2]
            error = (abs(fine.energy - coarse.energy) + fine.iteration_error + coarse.iteration_error
                     + fine.rounding_error + fine.tail_error)
            if error <= tol * scale or level >= MAX_LEVEL:
                break
        level += 1
    fine = states[-1]
    status = Status.CONVERGED if error <= tol * scale else Status.NOT_CONVERGED
    message = (f"converged in {time.perf_counter() - t0:.3g} s" if status is Status.CONVERGED else
               f"error estimate {error:.3g} above the tolerance after {MAX_LEVEL} refinements")
    ok = status is Status.CONVERGED
    return SolveResult(**base, status=status, energy=fine.energy if ok else np.nan,
                       error=error if ok else np.nan, momentum=fine.momentum, message=message,
                       iterations=iterations, residual=fine.residual,
                       effective_radius=_effective_radius(fine, radius, deformation) or np.nan,
                       fold_indicator=fine.fold_indicator, grid=fine.grid,
                       rapidity_grid=fine.grid.t, pseudo_energies=fine.eps, _state=fine)


def _effective_radius(state, radius, deformation):
    """R + alpha E for a TTbar-deformed ground state (exact for P = 0), else None."""
    if not deformation.is_ttbar:
        return None
    return radius + deformation.alpha * state.energy


def solve_radii(model, radii, deformation=None, *, tol=1e-12, start=None):
    """Solve a sequence of radii in order, each warm-started from the last converged one."""
    results = []
    for R in radii:
        res = solve_ground_state(model, R, deformation, tol=tol, start=start)
        if res.converged:
            start = res
        results.append(res)
    return results


def energy_derivatives(result, spins=(1,), second=False):
    """Exact derivatives of a converged ground-state energy, with error estimates.

    The linearised TBA equations J de/dx = -dF/dx are solved with the Newton Jacobian of
    the final grid (no finite differences). Returns a dict with ``dE_dR`` and
    ``dE_dalpha{s}`` for each spin in ``spins`` (also at alpha_s = 0), ``d2E_dR2`` when
    ``second`` is true, and for each key a
    ``<key>_error``: the difference from the same derivative on the coarser grid plus a
    rounding allowance, the same rule as for the energy.
    """
    if not result.converged:
        raise ValueError(f"result: derivatives need a converged point, got status {result.status.value}")
    fine = result._state
    d_fine = fine.derivatives(spins, second)
    d_coarse = fine.coarse.derivatives(spins, second) if fine.coarse is not None else None
    out = dict(d_fine)
    for key, value in d_fine.items():
        floor = 64 * _EPS * abs(value) * np.sqrt(fine.eps.size)
        out[key + "_error"] = (abs(value - d_coarse[key]) if d_coarse else abs(value)) + floor
    return out


def flow_residual(result):
    """The ground state's Burgers-equation residual d_alpha E - E d_R E - P^2/R (P = 0 here),
    from exact derivatives, with its error estimate and the scale |E dE/dR|."""
    d = energy_derivatives(result, spins=(1,))
    E, P, R = result.energy, result.momentum, result.radius
    residual = d["dE_dalpha1"] - E * d["dE_dR"] - P * P / R
    error = d["dE_dalpha1_error"] + abs(E) * d["dE_dR_error"] + result.error * abs(d["dE_dR"])
    return {"residual": residual, "error": error, "scale": abs(E * d["dE_dR"]), **d}
