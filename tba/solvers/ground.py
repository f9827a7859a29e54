"""Newton solver for the ground-state TBA of a diagonal model with CDD deformations.

The discretised equations on a uniform grid t_i (weights from `tba.solvers.operators`) are

    F_a(i) = eps_a(i) - m_a R cosh t_i + sum_b sum_j w_ab(i - j) L_b(j)
             + sum_r c_r u_r,a(i) sum_b sum_j v_r,b(j) L_b(j)  = 0

with w_ab the band-limited kernel weights (block models; the trapezoid rule for kernel
callables) and, for every CDD spin s, two rank-one terms (cosh and sinh parts of
cosh(s(t - t'))). The Jacobian is

    J = J0 + sum_r c_r u_r (v_r L')^T,    J0 = 1 + K diag(L').

Dense systems (every built-in model at ordinary radii: with band-limited kernels E8 needs
n N ~ 250-600 unknowns) run the compiled Newton iteration of `kernels.dense`: chord steps on
the inverse of J0 carried over from the previous radius of a scan (each grid level keeps its
own), Newton steps where those converge too slowly, the CDD terms through the Woodbury formula.
Large systems apply J through FFTs inside GMRES.

Every point is solved on two grids of increasing resolution (`tba.solvers.grid`); the
difference of their energies, plus the Newton iteration error and the rounding of the
equations propagated to E through the adjoint solution (which grows like 1/sqrt(R - R_c) next
to a branch point), is the error estimate. More levels are added until it meets the tolerance.
Where that rounding is amplified next to a fold, each level's energy is polished with residuals
in extended precision (`_polish`), leaving the conditioning floor eps R |dE/dR| in its place.
Each level starts from its own solutions at the previous radii (extrapolated in R on the same
grid), or from the coarser level of this point.

Real solutions stop existing at a fold (square-root branch point). Along the branch connected
to the undeformed theory the determinant of the small capacitance matrix of the rank-one
terms, ``fold_indicator``, is positive and vanishes at the fold. When Newton fails for a
deformed point or lands off that branch, the curve of solutions is followed to the point by
pseudo-arclength continuation (`tba.solvers.arclength`): in R from the previous point of a
scan, or in the scale of the couplings (0 -> 1) at fixed R. A turning point on the way means
there is no real solution; it is confirmed on the next finer grid before it is reported.
"""

import functools
import math
import numbers
import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import scipy.sparse.linalg

from kernels import dense as _dense
from kernels import occupation_terms
from tba.models.base import DiagonalModel
from tba.models.cdd import CDD, NO_DEFORMATION
from tba.solvers import arclength
from tba.solvers.grid import Grid, choose_grid
from tba.solvers.operators import operators, uses_band_limited_kernels
from tba.solvers.result import SolveResult, Status

#: refinement levels tried before a point is declared not converged
MAX_LEVEL = 4
_EPS = np.finfo(float).eps
#: the smallest relative tolerance offered: a few hundred ulps, where the rounding allowance
#: of a grid sum of ~10^3 terms still fits
MIN_TOL = 1e-13
_NO_MATRIX = np.zeros((1, 1))
#: refinement sweeps with an inverse of J0 from another point beyond which J0 is inverted anew
REFRESH_SWEEPS = 6


class Discretization:
    """The ground-state equations of ``model`` deformed by ``deformation`` at radius R on ``grid``."""

    def __init__(self, model, deformation, radius, grid):
        self.model, self.deformation, self.radius, self.grid = model, deformation, radius, grid
        ops = self.ops = operators(model, grid, deformation)
        self.shape = (model.n_species, grid.N)
        self.nu = radius * ops.drive
        self.U, self.V, self.c, self.U_flat, self.V_flat = ops.terms(deformation)
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
        S = self.V_flat @ L.reshape(-1)
        return S, ((self.c * S) @ self.U_flat).reshape(self.shape)

    def dressing(self, L):
        """-(K * L): the part of eps that comes from the model's own kernel."""
        return -self.ops.convolve(L)

    def residual(self, e, L):
        return e - self.nu - self.dressing(L) + self.separable(L)[1]

    def energy(self, L):
        return float(np.sum(self.wE * L))

    def coupling_derivative(self, L, spin):
        """dF/dalpha_s at fixed eps: (s / 2pi) [U_0 (V_0 . L) - U_1 (V_1 . L)] with the rows of
        `Operators.charge_rows` (massive: q_a cosh(s t) and q_a sinh(s t); spin 1: e_a, p_a).
        Works whether or not the deformation contains this spin (derivatives at alpha_s = 0)."""
        U, V = self.ops.charge_rows(self.deformation, spin)
        C = float(np.sum(V[0] * L))
        S = float(np.sum(V[1] * L))
        return (spin / (2 * np.pi)) * (C * U[0] - S * U[1])

    # -- the Jacobian --------------------------------------------------------------------
    def jacobian(self, dL, A=None):
        """J at L' = ``dL``; dense systems may reuse ``A``, an inverse of J0 at a nearby point."""
        if self.ops.dense:
            return DenseJacobian(self, dL, A)
        return KrylovJacobian(self, dL)

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
            e -= ((self.c * state.scalars) @ self.U_flat).reshape(self.shape)
        return e


def _interpolate(grid, values, t):
    """Cubic (4-point Lagrange) interpolation of values on ``grid`` at ``t``; 0 outside the grid.
    Exact at the points of ``grid`` (same spacing: the values are copied). Compiled
    (`kernels.dense.interpolate`)."""
    return _dense.interpolate(np.ascontiguousarray(values, dtype=float), float(grid.t[0]),
                              float(grid.h), np.ascontiguousarray(t, dtype=float))


class DenseJacobian:
    """J = J0 + U^T CVd through the Woodbury formula with A, an inverse of J0.

    ``A`` may belong to a nearby point (the previous radius, or the previous Newton iterate):
    every solve is then polished by iterative refinement against the exact J0 or J of this
    point, so that solutions, derivatives and the fold indicator are those of this point. If
    refinement does not converge (A too far away), J0 is inverted here."""

    def __init__(self, disc, dL, A=None):
        ops = disc.ops
        self.disc, self.dL = disc, dL
        self.K = ops.matrix if not ops.trivial else _NO_MATRIX
        self.trivial = ops.trivial
        self.dLf = np.ascontiguousarray(dL.reshape(-1))
        self.size = self.dLf.size
        self.fresh = A is None
        self.A = _dense.inverse_j0(self.K, self.dLf, self.trivial) if A is None else A
        self._setup()

    def _setup(self):
        d = self.disc
        self.CVd, Z, cap = _dense.capacitance(d.U_flat, d.V_flat, d.c, self.dLf, self.A)
        if not self.fresh and d.c.size:
            Z, cap, sweeps = _dense.refine_capacitance(self.K, d.U_flat, self.dLf, self.A,
                                                       self.CVd, Z, self.trivial, 30)
            if sweeps > REFRESH_SWEEPS:  # A is far from this point: cheaper to invert here
                self._refresh()
                return
        self.Z, self.cap = Z, cap

    def _refresh(self):
        self.A = _dense.inverse_j0(self.K, self.dLf, self.trivial)
        self.fresh = True
        self._setup()

    def solve0(self, b, rtol=None):
        """J0^{-1} b for a flat vector b (the undeformed Jacobian: well conditioned at folds)."""
        b = np.ascontiguousarray(b, dtype=float)
        x, ok, sweeps = _dense.solve_j0(self.K, self.dLf, self.A, b, self.trivial, 30)
        if (not ok or sweeps > REFRESH_SWEEPS) and not self.fresh:
            self._refresh()
            x, ok, sweeps = _dense.solve_j0(self.K, self.dLf, self.A, b, self.trivial, 30)
        return x

    def solve(self, rhs, rtol=None):
        d = self.disc
        b = np.ascontiguousarray(rhs.reshape(-1), dtype=float)
        x, ok = _dense.solve_linear(self.K, d.U_flat, d.V_flat, d.c, self.dLf, self.A, b,
                                    self.trivial, 30)
        if not ok and not self.fresh:
            self._refresh()
            x, ok = _dense.solve_linear(self.K, d.U_flat, d.V_flat, d.c, self.dLf, self.A, b,
                                        self.trivial, 30)
        if not ok:
            raise np.linalg.LinAlgError("the Jacobian is singular to working precision")
        return x.reshape(d.shape)

    def fold_indicator(self):
        """det(1 + C (V L')^T J0^{-1} U) = det J / det J0: 1 undeformed, 0 at a fold of the CDD
        terms."""
        if self.disc.c.size == 0:
            return 1.0
        return float(np.linalg.det(self.cap))

    def branch_indicator(self):
        """The fold indicator times the sign of det J0: positive on the branch connected to the
        undeformed large-R theory, for folds of the CDD terms (det cap changes sign) and of the
        kernel's own equations (det J0 does) alike. Costs a factorisation of J0."""
        sign, _ = np.linalg.slogdet(jacobian0_matrix(self))
        return sign * self.fold_indicator()

    def bordered_solve(self, f, p, q, a1, a2):
        """Solve [[J, f], [p^T, q]] [x; y] = [a1; a2] (f, p, a1 of the equations' shape).

        J is handled as J0 + U^T W with the Woodbury formula, so the bordered matrix may be
        regular while J itself is singular (at a fold): only J0 is inverted. Where J0 is
        singular too (a fold of the kernel's own equations) the bordered matrix is solved
        as it stands."""
        return _bordered(self, f, p, q, a1, a2)

    def capacitance_pair(self):
        return self.Z, self.CVd


def _bordered(jac, f, p, q, a1, a2):
    f, p, a1 = f.reshape(-1), p.reshape(-1), a1.reshape(-1)
    r = jac.disc.c.size
    with np.errstate(all="ignore"):
        ya, zf = jac.solve0(a1), jac.solve0(f)
        if r:
            Z, W = jac.capacitance_pair()
            M = np.zeros((r + 1, r + 1))
            M[:r, :r] = np.eye(r) + W @ Z
            M[:r, r] = W @ zf
            M[r, :r] = -(p @ Z)
            M[r, r] = q - p @ zf
            rhs = np.concatenate([W @ ya, [a2 - p @ ya]])
            try:
                sol = np.linalg.solve(M, rhs)
                w, y = sol[:r], float(sol[r])
                x = ya - Z @ w - zf * y
            except np.linalg.LinAlgError:
                x, y = np.full_like(a1, np.nan), np.nan
        else:
            y = float((a2 - p @ ya) / (q - p @ zf))
            x = ya - zf * y
    if isinstance(jac, DenseJacobian) and not _bordered_ok(jac, f, p, q, a1, a2, x, y):
        # J0 itself is (nearly) singular: a fold of the kernel's own equations (a turning
        # point of the model or of a pole factor), not of the rank-one CDD terms
        x, y = _bordered_dense(jac, f, p, q, a1, a2)
    return x.reshape(jac.disc.shape), float(y)


def jacobian0_matrix(jac):
    """J0 = 1 + K diag(L') of a dense Jacobian, as a matrix."""
    J0 = np.eye(jac.size)
    if not jac.trivial:
        J0 += jac.K * jac.dLf[None, :]
    return J0


def _full_jacobian(jac):
    d = jac.disc
    J = np.eye(jac.size)
    if not jac.trivial:
        J += jac.K * jac.dLf[None, :]
    if d.c.size:
        J += d.U_flat.T @ jac.CVd
    return J


def _bordered_ok(jac, f, p, q, a1, a2, x, y):
    """The solution through J0 satisfies the bordered system to near rounding."""
    if not (np.all(np.isfinite(x)) and math.isfinite(y)):
        return False
    d = jac.disc
    Jx = x + (jac.K @ (jac.dLf * x) if not jac.trivial else 0.0)
    if d.c.size:
        Jx = Jx + d.U_flat.T @ (jac.CVd @ x)
    res = np.max(np.abs(Jx + f * y - a1))
    scale = np.max(np.abs(a1)) + np.max(np.abs(f)) * abs(y) + np.max(np.abs(x)) + 1e-300
    return res <= 1e-10 * scale and abs(p @ x + q * y - a2) <= 1e-10 * (abs(a2) + np.max(np.abs(p)) * np.max(np.abs(x)) + abs(q * y) + 1e-300)


def _bordered_dense(jac, f, p, q, a1, a2):
    M = jac.size
    B = np.zeros((M + 1, M + 1))
    B[:M, :M] = _full_jacobian(jac)
    B[:M, M] = f
    B[M, :M] = p
    B[M, M] = q
    sol = np.linalg.solve(B, np.concatenate([a1, [a2]]))
    return sol[:M], float(sol[M])


class KrylovJacobian:
    """J = J0 + U C (V L')^T applied through FFT products, solved with GMRES (large systems).

    GMRES on J for Newton steps; near a fold, Woodbury with the well-conditioned J0."""

    def __init__(self, disc, dL):
        self.disc = disc
        self.dL = dL
        n, N = disc.shape
        self.size = n * N
        r = disc.c.size
        self.CVd = disc.c[:, None] * (disc.V * dL).reshape(r, n * N)
        self.Uf = disc.U_flat
        self._cap = self._Z = None
        self._cap_rtol = np.inf
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
        try:  # GMRES on J converges in a few dozen steps away from folds
            return self._gmres(self._op, b, rtol, maxiter=2).reshape(self.disc.shape)
        except np.linalg.LinAlgError:
            if self.disc.c.size == 0:
                raise
        # near a fold J is ill conditioned: Woodbury with the well-conditioned J0
        Z, cap = self._capacitance(rtol=1e-13)
        y = self.solve0(b, rtol)
        return (y - Z @ np.linalg.solve(cap, self.CVd @ y)).reshape(self.disc.shape)

    def solve0(self, b, rtol=1e-13):
        """J0^{-1} b for a flat vector b."""
        return self._gmres(self._op0, b, rtol)

    def _capacitance(self, rtol=1e-10):
        """(Z = J0^{-1} U^T, cap = 1 + C (V L')^T Z). With GMRES, 1e-10 is plenty for the fold
        indicator (a sign and a size); solves near a fold ask for more and get it."""
        if self._cap is None or rtol < self._cap_rtol:
            r = self.disc.c.size
            self._Z = np.stack([self.solve0(self.Uf[k], rtol) for k in range(r)], axis=1)
            self._cap = np.eye(r) + self.CVd @ self._Z
            self._cap_rtol = rtol
        return self._Z, self._cap

    def capacitance_pair(self):
        return self._capacitance(rtol=1e-13)[0], self.CVd

    def fold_indicator(self):
        if self.disc.c.size == 0:
            return 1.0
        return float(np.linalg.det(self._capacitance()[1]))

    def branch_indicator(self):
        """The fold indicator (no determinant of J0 for systems this large)."""
        return self.fold_indicator()

    def _matvec0_transposed(self, x):
        x = np.asarray(x).reshape(self.disc.shape)
        return (x + self.dL * self.disc.ops.convolve_transposed(x)).reshape(-1)

    def adjoint(self, b, rtol=1e-6):
        """J^{-T} b for a flat vector b, through J0^T (well conditioned next to folds):
        b^T J^{-1} = b^T (A - Z cap^{-1} CVd A) with A = J0^{-1}, Z = A U^T, so
        J^{-T} b = J0^{-T} (b - CVd^T cap^{-T} Z^T b): one GMRES solve with J0^T."""
        rhs = np.asarray(b, dtype=float)
        if self.disc.c.size:  # the capacitance of the fold indicator (GMRES to 1e-10)
            Z, cap = self._capacitance()
            rhs = rhs - self.CVd.T @ np.linalg.solve(cap.T, Z.T @ rhs)
        op = scipy.sparse.linalg.LinearOperator((self.size, self.size),
                                                matvec=self._matvec0_transposed, dtype=float)
        return self._gmres(op, rhs, rtol)

    def rounding_error(self, e, L):
        """The effect on E of rounding errors in the equations and in the energy sum, as on the
        dense path (`kernels.dense.rounding_error`): ROUNDING_SAFETY sqrt(sum_i (lambda_i
        dF_i)^2) + 4 eps sum |wE L| with lambda = J^{-T} (L' wE) and dF_i = eps (|e_i| +
        |nu_i| + sum_j |K_ij L_j| + |rank-one terms_i|). Near a fold lambda grows like dE/dR:
        the amplification the error estimate must carry."""
        d = self.disc
        try:
            lam = self.adjoint((self.dL * d.wE).reshape(-1))
        except np.linalg.LinAlgError:  # no bound on the amplification: no certified number
            return math.inf
        S = d.V_flat @ L.reshape(-1)
        sep = (np.abs(d.c * S) @ np.abs(d.U_flat)).reshape(d.shape) if d.c.size else 0.0
        dF = _EPS * (np.abs(e) + np.abs(d.nu) + d.ops.convolve_abs(np.abs(L)) + sep)
        total = float(np.sqrt(np.sum((lam.reshape(d.shape) * dF) ** 2)))
        return _dense.ROUNDING_SAFETY * total + 4 * _EPS * float(np.sum(np.abs(d.wE * L)))

    def bordered_solve(self, f, p, q, a1, a2):
        return _bordered(self, f, p, q, a1, a2)


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
    _disc: object = field(default=None, repr=False)
    jac: object = field(default=None, repr=False)
    L: np.ndarray = field(default=None, repr=False)
    dL: np.ndarray = field(default=None, repr=False)
    coarse: object = field(default=None, repr=False)
    #: an inverse of J0 near this point (dense systems): chord steps of the next radius
    A: object = field(default=None, repr=False)
    #: (radii, g = eps - R drive) of this grid level at this and up to five previous radii
    #: of a scan, newest first (for extrapolation in R)
    history: tuple = field(default=None, repr=False)
    #: every grid level of this point, coarsest first (each level's own warm starts)
    levels: list = field(default=None, repr=False)
    model: object = field(default=None, repr=False)

    @property
    def disc(self):
        """The discretised equations of this point (built on first use)."""
        if self._disc is None:
            self._disc = Discretization(self.model, self.deformation, self.radius, self.grid)
        return self._disc

    def jacobian(self):
        if self.jac is None:
            self.jac = self.disc.jacobian(self.dL, A=self.A)
        return self.jac

    def derivatives(self, spins=(1,), second=False):
        """Exact dE/dR, dE/dalpha_s (and d2E/dR2) on this grid from the linearised equations
        J de/dx = -dF/dx with the Newton Jacobian."""
        disc, jac = self.disc, self.jacobian()
        out = {}
        de = jac.solve(disc.nu / disc.radius, rtol=1e-13)  # dF/dR = -nu / R
        out["dE_dR"] = float(np.sum(disc.wE * self.dL * de))
        if second:
            # d/dR of J e' + F_R = 0: J e'' = -(K + separable)(L'' e'^2), F_R has no eps in it
            # d2L/deps2: e^eps / (1 + e^eps)^2 = -L'(1 + L') (fermions), e^eps / (e^eps - 1)^2 =
            # L'(L' - 1) (bosons)
            d2L = -self.dL * (1.0 + self.dL) if disc.sign > 0 else self.dL * (self.dL - 1.0)
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
    rounding: float = None
    A: object = field(default=None, repr=False)

    def jacobian(self):
        if self.jac is None:
            self.jac = self.disc.jacobian(self.dL, A=self.A)
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


def _newton_dense(disc, e, tol, maxiter, A):
    """The compiled Newton iteration (kernels.dense) on the flattened equations."""
    ops = disc.ops
    M = e.size
    K = ops.matrix if not ops.trivial else _NO_MATRIX
    have_A = A is not None and A.shape == (M, M)
    e_, L, dL, it, res, dE, status, fold, rounding, A_out, _ = _dense.newton(
        K, disc.nu.reshape(-1), disc.U_flat, disc.V_flat, disc.c, ops.wE_flat,
        np.ascontiguousarray(e, dtype=float).reshape(-1), disc.sign, float(tol), maxiter,
        A if have_A else _NO_MATRIX, have_A, ops.trivial)
    shape = disc.shape
    ok = status == _dense.CONVERGED
    return _Newton(ok, e_.reshape(shape), L.reshape(shape), dL.reshape(shape), int(it), float(res),
                   float(dE), _DENSE_MESSAGES[status].format(maxiter=maxiter), disc=disc,
                   fold=float(fold) if ok else None, rounding=float(rounding) if ok else None,
                   A=A_out if A_out.shape == (M, M) else None)


def newton(disc, e, tol, maxiter=60, A=None):
    """Newton's method with backtracking on the discretised equations, from ``e``.

    Each step first solves for the Newton correction delta. When the energy change it
    would make, |dE/deps . delta|, is below ``tol |E| / 100`` and delta is small (the
    quadratic regime), the current point is returned without the step and that change
    is its iteration error: an estimate of the distance to the exact discrete solution
    that needs no extra solve. Dense systems run the compiled iteration
    (`kernels.dense.newton`, chord steps on ``A`` when it is given).
    """
    if disc.ops.dense:
        return _newton_dense(disc, e, tol, maxiter, A)
    L, dL, ok = disc.occupation(e)
    if not ok:
        return _Newton(False, e, L, dL, 0, np.inf, np.inf, "initial guess outside the domain of L")
    F = disc.residual(e, L)
    r = float(np.max(np.abs(F)))
    floor = 64 * _EPS * max(1.0, float(np.max(np.abs(disc.nu))))
    dE = np.inf
    at_floor = 0
    for it in range(maxiter + 1):
        try:
            jac = disc.jacobian(dL)
            delta = jac.solve(-F, rtol=min(1e-3, max(1e-13, 1e-2 * r)))
        except (np.linalg.LinAlgError, ValueError) as exc:
            return _Newton(False, e, L, dL, it, r, dE, f"linear solve failed: {exc}")
        dE_last, dE = dE, abs(float(np.sum(disc.wE * dL * delta)))
        small = float(np.max(np.abs(delta))) < 1e-6 or r <= floor
        if small and dE <= max(1e-2 * tol, 8 * _EPS) * abs(disc.energy(L)):
            return _Newton(True, e, L, dL, it, r, dE, "converged", jac, disc)
        if r <= 1e3 * floor and dE > 0.5 * dE_last:
            # residual at rounding level, steps still above the request and no longer
            # shrinking: next to a fold they are amplified rounding noise (as in
            # `kernels.dense.newton`). After FLOOR_STEPS of them stop, the larger of the last two energy changes being the iterate's
            # iteration error: the caller's tolerance decides whether that is good enough
            at_floor += 1
            if at_floor >= _dense.FLOOR_STEPS:
                return _Newton(True, e, L, dL, it, r, max(dE, dE_last),
                               "converged (rounding floor)", jac, disc)
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
    ops = disc.ops
    L, e = nt.L, nt.e
    n, N = disc.shape
    K = ops.matrix if ops.dense else _NO_MATRIX
    dressing, S, E, P, tail = _dense.summary(K, L.reshape(-1), e.reshape(-1), ops.wE_flat,
                                             ops.wP_flat, disc.V_flat, n, N,
                                             ops.trivial or not ops.dense)
    dressing = dressing.reshape(disc.shape) if ops.dense else disc.dressing(L)
    if nt.rounding is not None:  # the compiled iteration propagates rounding through J^{-T}
        rounding = nt.rounding
    else:  # the Krylov path: rounding of the equations through the adjoint solution
        rounding = nt.jacobian().rounding_error(e, L)
    if fold is None:
        fold = nt.fold_indicator
    return State(grid=disc.grid, radius=disc.radius, deformation=disc.deformation, eps=e,
                 dressing=dressing, scalars=S, energy=E, momentum=P,
                 iteration_error=nt.last_dE, rounding_error=float(rounding), tail_error=tail,
                 fold_indicator=float(fold), residual=nt.residual, iterations=nt.iterations,
                 _disc=disc, jac=nt.jac, L=L, dL=nt.dL, A=nt.A, model=disc.model)


# -- warm starts ---------------------------------------------------------------------------------

def _compatible(seed, disc):
    return seed.grid == disc.grid and seed.deformation == disc.deformation


def _start(disc, seed, coarse):
    """(initial eps on disc.grid, an inverse of J0 for chord steps or None).

    Preference: the level's own history at previous radii (same grid and deformation:
    extrapolated in R, with its inverse of J0); else this point's coarser level; else any
    solved neighbour."""
    if seed is not None and seed.grid == disc.grid:
        if seed.history is not None and seed.deformation == disc.deformation:
            radii, g = seed.history
            e0 = disc.nu + _dense.extrapolate(radii, g, disc.radius).reshape(disc.shape)
            return e0, seed.A
        return disc.initial_guess(seed), seed.A
    if coarse is not None:
        return disc.initial_guess(coarse), None
    if seed is not None:
        return disc.initial_guess(seed), None
    return disc.nu.copy(), None


_NO_HISTORY = (np.zeros(0), np.zeros((0, 1)))


@dataclass
class _Failure:
    """Why Newton on a grid did not give a solution (the fields of `_Newton` callers read)."""

    message: str
    iterations: int
    ok: bool = False


def _solve_on(model, deformation, radius, grid, tol, seed, coarse, rule=None):
    """Newton on one grid from the best start (`_start`): (State, outcome) with State None if
    Newton failed. Dense systems take one compiled call for start, iteration, summary and the
    level's history (`kernels.dense.solve_level`): the path of every point of a scan.
    ``rule``: the `_GridRule` of (model, deformation, tol), which keeps the operators."""
    if rule is None:
        ops = operators(model, grid, deformation)
        terms = None
    else:
        ops, terms = rule.operators(grid)
    if not ops.dense:
        disc = Discretization(model, deformation, radius, grid)
        e0, A = _start(disc, seed, coarse)
        nt = newton(disc, e0, tol, A=A)
        if not nt.ok:
            return None, nt
        state = _state(disc, nt)
        _link(state, seed)
        return state, nt
    U, V, c, Uf, Vf = terms or ops.terms(deformation)
    n, N = ops.n, ops.N
    M = n * N
    same = seed is not None and (seed.grid is grid or seed.grid == grid)
    A = seed.A if same and seed.A is not None and seed.A.shape == (M, M) else None
    use_history = same and seed.history is not None and (seed.deformation is deformation
                                                         or seed.deformation == deformation)
    disc = None
    if use_history:
        hist_r, hist_g = seed.history
        e_start = _NO_HISTORY[0]
    else:
        hist_r, hist_g = _NO_HISTORY[0], np.zeros((0, M))
        disc = Discretization(model, deformation, radius, grid)
        e_start = np.ascontiguousarray(_start(disc, seed, coarse)[0].reshape(-1))
    K = ops.matrix if not ops.trivial else _NO_MATRIX
    out = np.empty((4 + _dense.HISTORY, n, N))  # the compiled call fills it through `flat`
    flat = out.reshape(4 + _dense.HISTORY, M)
    small = np.empty(c.size + _dense.HISTORY)
    its, res, dE, status, fold, rounding, A_out, E, P, tail, k = _dense.solve_level(
        K, ops.drive_flat, Uf, Vf, c, ops.wE_flat, ops.wP_flat, radius, hist_r, hist_g,
        use_history, e_start, rule.sign if rule is not None else
        (1 if model.statistics == "fermion" else -1), tol, 60,
        A if A is not None else _NO_MATRIX, A is not None, ops.trivial, n, N, flat, small)
    if status != _dense.CONVERGED:
        return None, _Failure(_DENSE_MESSAGES[status].format(maxiter=60), its)
    r = c.size
    state = State(grid=grid, radius=radius, deformation=deformation, eps=out[0],
                  dressing=out[3], scalars=small[:r], energy=E, momentum=P,
                  iteration_error=dE, rounding_error=rounding, tail_error=tail,
                  fold_indicator=fold, residual=res, iterations=its, _disc=disc,
                  L=out[1], dL=out[2], A=A_out, history=(small[r:r + k], flat[4:4 + k]),
                  model=model)
    return state, state


def _link(state, seed):
    """The level's history along a scan: this state's g = eps - R drive in front of the
    seed's (same grid and deformation, other radii; at most `kernels.dense.HISTORY`)."""
    g = (state.eps - state.disc.nu).reshape(1, -1)
    radii = np.array([state.radius])
    if seed is not None and seed.history is not None and _compatible(seed, state.disc):
        old_r, old_g = seed.history
        keep = old_r != state.radius
        radii = np.concatenate([radii, old_r[keep][:_dense.HISTORY - 1]])
        g = np.concatenate([g, old_g[keep][:_dense.HISTORY - 1]])
    state.history = (radii, g)


# -- extended-precision polish -----------------------------------------------------------------

#: a state is polished when rounding and iteration error exceed this fraction of the tolerance
POLISH_FRACTION = 1e-2
#: ... and their rounding allowance is amplified (next to a fold): above this, relative (~100
#: ulps; ordinary points have a few ulps, E8 at R_c(1 + 1e-4) 2e-14)
AMPLIFIED = 1e-14
_LONG = np.longdouble
#: extended precision is available (x86: 64-bit mantissa); elsewhere no polish is done
_LONG_EPS = float(np.finfo(_LONG).eps)
_HAVE_LONG = _LONG_EPS < 1e-18


def _long_residual(disc, x):
    """(F, L, E) at eps = ``x`` (extended precision), the equations' data (kernel matrix,
    drive, rank-one rows, weights) taken as exact double numbers."""
    if disc.sign > 0:
        ex = np.exp(-np.abs(x))
        L = np.where(x > 0, np.log1p(ex), -x + np.log1p(ex))
    else:
        L = -np.log(-np.expm1(-x))
    ops = disc.ops
    F = x - disc.nu.reshape(-1).astype(_LONG)
    if not ops.trivial:
        F = F + ops.matrix.astype(_LONG) @ L
    if disc.c.size:
        S = disc.V_flat.astype(_LONG) @ L
        F = F + (np.asarray(disc.c, dtype=_LONG) * S) @ disc.U_flat.astype(_LONG)
    return F, L, np.sum(ops.wE_flat.astype(_LONG) * L)


def _polish(state):
    """Next to a fold dE/deps is large and the rounding of the double-precision equations
    (and the Newton steps they drive) limits the energy: correct it by two Newton steps whose
    residuals and energies are evaluated in extended precision (mixed-precision iterative
    refinement; the linear solves stay in double, the dense Jacobian at this point). Each
    energy is E(eps) - lambda . F(eps) with lambda = J^{-T} (L' wE), the adjoint: the energy
    the Newton step from eps would reach. The change between the two corrected energies is the
    remaining iteration error; rounding is then that of extended precision (the double
    estimate scaled by the ratio of the epsilons, with a safety factor of 4), the rounding of
    the final energy to double, and the conditioning floor eps R |dE/dR| (one ulp of R), which
    keeps points too close to the fold for the tolerance refused. Dense systems with extended
    precision only; elsewhere (and if the corrections do not settle) a no-op."""
    disc = state.disc
    if not (_HAVE_LONG and disc.ops.dense) or state.L is None:
        return
    if not state.iteration_error <= 1e-6 * abs(state.energy):
        return  # not converged to the rounding floor: nothing for the polish to correct
    M = state.eps.size
    dL = state.dL.reshape(-1)
    J = np.eye(M)
    if not disc.ops.trivial:
        J = J + disc.ops.matrix * dL[None, :]
    if disc.c.size:
        J = J + (disc.U_flat.T * np.asarray(disc.c)) @ (disc.V_flat * dL[None, :])
    try:
        lu = scipy.linalg.lu_factor(J, check_finite=True)
    except (ValueError, np.linalg.LinAlgError):
        return
    lam = scipy.linalg.lu_solve(lu, dL * disc.ops.wE_flat, trans=1)
    x = state.eps.reshape(-1).astype(_LONG)
    energies = []
    for _ in range(2):
        with np.errstate(all="ignore"):
            F, L, E = _long_residual(disc, x)
        if not (np.all(np.isfinite(F)) and np.isfinite(E)):
            return
        energies.append(E - np.sum(lam.astype(_LONG) * F))
        x = x - scipy.linalg.lu_solve(lu, F.astype(float)).astype(_LONG)
    change = abs(float(energies[1] - energies[0]))
    if not change <= state.rounding_error + state.iteration_error:
        return  # the correction does not settle: keep the double-precision estimate
    state.energy = float(energies[1])
    state.iteration_error = change
    energy_sum = float(np.sum(np.abs(disc.ops.wE_flat * state.L.reshape(-1))))
    # the conditioning floor: eps R |dE/dR| (lambda . nu = R dE/dR), what one ulp of R changes;
    # next to a fold every perturbation of the equations (the grid's too) is amplified so
    conditioning = _EPS * abs(float(np.dot(lam, disc.nu.reshape(-1))))
    state.rounding_error = (4.0 * (_LONG_EPS / _EPS) * state.rounding_error + 4 * _EPS * energy_sum
                            + conditioning)


# -- folds ---------------------------------------------------------------------------------------

@dataclass
class _Verdict:
    """No real solution on a grid: the curve turned back at ``p_fold`` (radius or coupling
    scale) before the requested point."""

    parameter: str
    p_fold: float
    message: str
    iterations: int = 0


def _reach(model, deformation, radius, grid, tol, seed):
    """Follow the curve of solutions to (radius, deformation) on ``grid`` when Newton at the
    point failed or left the physical branch. In R from ``seed`` (a solved point of the same
    deformation at another radius); else in the scale of the spin couplings at fixed R, from
    the model times the deformation's pole factors; else (no spins, or that base has no
    solution at R) in R from a large radius. Returns (_Newton, None) or (None, _Verdict) or
    (None, message)."""
    tried = None
    if seed is not None and seed.deformation == deformation and seed.radius != radius:
        out = _follow_radius(model, deformation, radius, grid, tol, seed.radius, seed)
        if out is not None and (out[0] is not None or isinstance(out[1], _Verdict)):
            return out
        tried = out
    if deformation.couplings:
        out = _follow_scale(model, deformation, radius, grid, tol, seed)
        if out[0] is not None or isinstance(out[1], _Verdict):
            return out
        tried = out
    big = max(2.0 * radius, LARGE_RADIUS / _mass_scale(model))
    out = _follow_radius(model, deformation, radius, grid, tol, big, None)
    if out is not None:
        return out
    return tried if tried is not None else (None, "no solution to start a continuation from")


#: where continuations in R start when nothing closer is known: the TBA is a small correction
#: to the free driving term there, and Newton from that term converges
LARGE_RADIUS = 4.0


def _follow_radius(model, deformation, radius, grid, tol, start_radius, seed):
    disc0 = Discretization(model, deformation, start_radius, grid)
    if seed is not None:
        e0, A = _start(disc0, seed, None)
    else:
        e0, A = disc0.nu.copy(), None
    nt = newton(disc0, e0, 1e-14, A=A)
    if not (nt.ok and _physical(nt.jacobian())):
        return None
    fam = arclength.Family(model, deformation, None, grid, "radius")
    pt = arclength.point(fam, nt.e, start_radius, disc0, nt.jacobian(), nt.L,
                         direction=radius - start_radius)
    return _outcome(fam, pt, radius, tol, "radius")


def _physical(jac):
    return jac.branch_indicator() > 0


def _follow_scale(model, deformation, radius, grid, tol, seed):
    base = deformation.pole_part()
    disc0 = Discretization(model, base, radius, grid)
    nt = newton(disc0, disc0.initial_guess(seed), tol, A=seed.A if seed is not None and
                seed.grid == grid else None)
    if not nt.ok:
        return None, f"the equations without the spin couplings: {nt.message}"
    fam = arclength.Family(model, deformation, radius, grid, "scale")
    pt = arclength.point(fam, nt.e, 0.0, disc0, nt.jacobian(), nt.L, direction=1.0)
    return _outcome(fam, pt, 1.0, tol, "scale")


def _outcome(fam, pt, target, tol, parameter):
    out = arclength.follow(fam, pt, target)
    if out.kind == "target" and out.point is not None:
        p = out.point
        nt = newton(p.disc, p.eps, tol, A=getattr(p.jac, "A", None))
        if nt.ok and _physical(nt.jacobian()):
            return nt, None
        return None, "the continued solution left the physical branch"
    if out.kind == "fold":
        p_fold = out.point.p
        toward = math.copysign(1.0, target - pt.p)
        if (target - p_fold) * toward > 0:  # the curve turned before the target
            return None, _Verdict(parameter, p_fold, "", out.steps)
        # the turning point lies just beyond the target: land on the incoming branch
        land = arclength.land_near_fold(fam, out.point, target, out.curvature)
        if land is not None:
            nt = newton(land.disc, land.eps, tol, A=getattr(land.jac, "A", None))
            if nt.ok and _physical(nt.jacobian()):
                return nt, None
        return None, "could not land on the physical branch next to the fold"
    return None, out.message or "continuation failed"


# -- the point solve ------------------------------------------------------------------------------

def require_model(model):
    """TypeError naming the argument unless ``model`` is a DiagonalModel (e.g. a name)."""
    if not isinstance(model, DiagonalModel):
        raise TypeError(f"model must be a DiagonalModel (e.g. tba.sinh_gordon(0.6) or "
                        f"tba.get_model(name)), got {type(model).__name__} {model!r}")
    return model


def require_deformation(deformation):
    """The deformation (NO_DEFORMATION for None); TypeError naming the argument unless a CDD."""
    deformation = NO_DEFORMATION if deformation is None else deformation
    if not isinstance(deformation, CDD):
        raise TypeError(f"deformation must be a CDD (e.g. tba.ttbar(0.1)), got "
                        f"{type(deformation).__name__} {deformation!r}")
    return deformation


def _unbounded_spin_tails(model, deformation):
    """Why the ground state has no real solution because of the highest CDD spin s > 1, or
    None. Its term s alpha_s E_s q_s^a cosh(s t) in eps_a outgrows m_a R cosh t, and E_s =
    -(1/2pi) sum_b q_s^b int cosh(s t) L_b (L_b > 0); when q_s has one sign (one species: q_s = 1)
    E_s has the opposite sign, so alpha_s > 0 makes every eps_a unbounded below: L and E_s
    diverge, at every radius (tba/models/cdd.py). A finite grid would hide the tail and give a
    number that depends on its cutoff. Charges of both signs are not decided here (README,
    Known limitations)."""
    spins = [s for s, a in deformation.couplings.items() if s > 1 and a]
    if not spins or model.is_massless:
        return None
    s = max(spins)
    alpha = float(deformation.couplings[s])
    q = np.asarray(model.charges(s), dtype=float)
    if alpha <= 0 or not (np.all(q > 0) or np.all(q < 0)):
        return None
    return (f"no real solution: the spin-{s} CDD term {s} alpha_{s} E_{s} q cosh({s} t) with "
            f"alpha_{s} = {alpha:g} > 0 and E_{s} q < 0 makes eps unbounded below as |t| -> oo, "
            f"at every radius (alpha_{s} < 0 is the side with a real ground state)")


def require_start(start):
    """TypeError naming the argument unless ``start`` is None or a SolveResult (a solved
    neighbour; one that does not fit the point is ignored, as documented)."""
    if start is not None and not isinstance(start, SolveResult):
        raise TypeError(f"start must be a SolveResult (a solved neighbour) or None, got "
                        f"{type(start).__name__} {start!r}")
    return start


def _validate(radius, tol):
    if (type(radius) is float or type(radius) is np.float64) and type(tol) is float \
            and 0 < radius < math.inf and MIN_TOL <= tol < 1e-2:  # the common case, quickly
        return float(radius), tol
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


def grid_pole_distance(model, deformation=None):
    """The kernel pole distance the grid rule must respect: none for band-limited kernels,
    else the nearest pole of the model's kernels and of the deformation's pole factors."""
    if uses_band_limited_kernels(model):
        return math.inf
    factors = deformation.singularity_distance if deformation is not None else math.inf
    return min(model.pole_distance, factors)


@functools.lru_cache(maxsize=8192)
def _cached_grid(pole_distance, min_mass, r_q, tol, level, cutoff_extra, max_spin, massless,
                 kernel_decay):
    return choose_grid(pole_distance, min_mass, r_q, tol, level, cutoff_extra, max_spin=max_spin,
                       massless=massless, kernel_decay=kernel_decay)


def _mass_scale(model):
    """The smallest mass of the model, massive or light-cone: the scale of "large R"."""
    min_mass, massless, _ = grid_masses(model)
    return min(m for m in (min_mass, *massless) if m)


def grid_masses(model):
    """(smallest mass of the massive species or None, the light-cone masses of the massless ones,
    the kernels' decay rate): what the grid rule needs of the species
    (`tba.solvers.grid.choose_grid`: ``min_mass``, ``massless``, ``kernel_decay``)."""
    if not model.is_massless:
        return float(np.min(model.masses)), (), None
    return model.massive_mass, model.massless_scales, model.kernel_decay


def _grid(model, deformation, r_eff, tol, level, cutoff_extra):
    """The grid of a refinement level. The effective radius is rounded down to 1/64 of an
    octave (a slightly wider cutoff, never a coarser grid), so that neighbouring radii share
    grids, operators and inverses of J0."""
    return _GridRule(model, deformation, tol).grid(r_eff, level, cutoff_extra)


class _GridRule:
    """`_grid` for one model, deformation and tolerance: what the rule needs of them is taken
    once, and the grids are kept by (octave index of the effective radius, level, cutoff
    extra), so that the radii of a scan look their grids up in one dictionary."""

    __slots__ = ("args", "tol", "grids", "model", "deformation", "ops", "ttbar", "sign", "tails")

    def __init__(self, model, deformation, tol):
        min_mass, massless, kernel_decay = grid_masses(model)
        self.args = (grid_pole_distance(model, deformation), min_mass,
                     max(deformation.couplings, default=1), massless, kernel_decay)
        self.tol = tol
        self.grids = {}
        self.model, self.deformation = model, deformation
        self.ops = {}
        #: the TTbar coupling when R + alpha E is the effective radius (`_effective_radius`)
        self.ttbar = deformation.alpha if deformation.is_ttbar else None
        self.sign = 1 if model.statistics == "fermion" else -1
        #: `_unbounded_spin_tails` of (model, deformation): the same at every radius
        self.tails = _unbounded_spin_tails(model, deformation)

    def effective_radius(self, state, radius):
        """`_effective_radius` of a state at ``radius``: R + alpha E or None."""
        if state is None or self.ttbar is None:
            return None
        return radius + self.ttbar * state.energy

    def operators(self, grid):
        """(`operators` of the model on ``grid``, their separable terms of the deformation)."""
        out = self.ops.get(grid)
        if out is None:
            ops = operators(self.model, grid, self.deformation)
            out = self.ops[grid] = (ops, ops.terms(self.deformation))
        return out

    def grid(self, r_eff, level, cutoff_extra):
        return self.grid_of_key(math.floor(64 * math.log2(r_eff)), level, cutoff_extra)

    def grid_of_key(self, octave_key, level, cutoff_extra):
        """The grid for effective radii R with floor(64 log2 R) = ``octave_key``."""
        key = (octave_key, level, cutoff_extra)
        grid = self.grids.get(key)
        if grid is None:
            pole, min_mass, max_spin, massless, decay = self.args
            grid = self.grids[key] = _cached_grid(pole, min_mass, 2.0 ** (key[0] / 64), self.tol,
                                                  level, cutoff_extra, max_spin, massless, decay)
        return grid


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
        A solved neighbour (other radius or coupling) to start Newton from. Along a scan
        (`solve_radii`) each grid level then extrapolates from its own previous solutions.

    Returns
    -------
    SolveResult
        status CONVERGED, NO_REAL_SOLUTION (a fold lies between the undeformed theory and
        the requested coupling at this R) or NOT_CONVERGED; energy and error are NaN
        unless converged.
    """
    radius, tol, deformation, prev = _checked(model, radius, deformation, tol, start)
    return _solve_point(model, radius, deformation, tol, prev, _GridRule(model, deformation, tol))


def _checked(model, radius, deformation, tol, start):
    """(radius, tol, deformation, the start's State or None) after checking the arguments."""
    radius, tol = _validate(radius, tol)
    require_model(model)
    deformation = require_deformation(deformation)
    require_start(start)
    prev = None
    if isinstance(start, SolveResult) and start.converged and isinstance(start._state, State) \
            and start._state.model is model:
        prev = start._state
    return radius, tol, deformation, prev


#: a scan keeps a level's grid while the rule asks for the same spacing and up to this many
#: fewer points (a narrower cutoff)
KEEP_POINTS = 8


def _keep_wider(grid, seed):
    """The seed's grid instead of ``grid`` when it has the same spacing and a cutoff at most
    KEEP_POINTS / 2 steps wider: a wider cutoff is never less accurate (the tails are still
    checked), and the level then starts from its own history and inverse of J0 instead of
    interpolating and inverting anew where the rule's cutoff moves by one quantum (or back
    and forth across the tail check)."""
    if seed is None:
        return grid
    g = seed.grid
    if g is grid or g.h != grid.h or not grid.N <= g.N <= grid.N + KEEP_POINTS:
        return grid
    return g


def _solve_point(model, radius, deformation, tol, prev, rule):
    """`solve_ground_state` after its checks, with the grid rule of (model, deformation, tol)."""
    t0 = time.perf_counter()
    base = dict(model=model.name, radius=radius, couplings=dict(deformation.couplings),
                coupling=model.coupling)
    tails = rule.tails
    if tails is not None:
        return SolveResult(**base, status=Status.NO_REAL_SOLUTION, iterations=0, message=tails)
    prev_levels = (prev.levels or [prev]) if prev is not None else []
    r_eff = rule.effective_radius(prev, radius)
    r_eff = r_eff if r_eff and r_eff > 0 else radius
    states = []
    iterations = 0
    level, cutoff_extra = 0, 0.0
    verdicts = []
    while True:
        grid = rule.grid(r_eff, level, cutoff_extra)
        seed = prev_levels[level] if level < len(prev_levels) else (prev_levels[-1] if prev_levels else None)
        if cutoff_extra == 0:  # (a widened cutoff is the rule's own answer to its tails)
            grid = _keep_wider(grid, seed)
        coarse = states[-1] if states else None
        state, nt = _solve_on(model, deformation, radius, grid, tol, seed, coarse, rule)
        iterations += nt.iterations
        if deformation.is_zero:
            fold = 1.0
        else:
            fold = state.fold_indicator if state is not None else np.nan
        if not (state is not None and fold > 0):
            state = None
            nt, why = _reach(model, deformation, radius, grid, tol, seed)
            if nt is None:
                if isinstance(why, _Verdict):
                    verdicts.append(why)
                    if states:  # a coarser grid had a real solution: too close to decide
                        return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                           message=_too_close(why, states))
                    if len(verdicts) >= 2 or level >= MAX_LEVEL or _clear(why, radius, tol):
                        return _no_real_solution(base, verdicts, iterations, radius)
                    level += 1
                    continue
                if verdicts:
                    return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                       message=f"the grid of level {level - 1} has no real "
                                               f"solution here, the next one {why}: too close "
                                               f"to the branch point to decide")
                return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                   message=why)
            if verdicts:  # a coarser grid folded, this one reaches the point: undecided
                return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                   message=_too_close(verdicts[-1], [None]))
            state = _state(nt.disc, nt, nt.fold_indicator)
            _link(state, seed)
        if state is None:
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                               message=nt.message)
        size = abs(state.energy)
        if state.rounding_error > AMPLIFIED * size and \
                state.rounding_error + state.iteration_error > POLISH_FRACTION * tol * size:
            _polish(state)  # next to a fold: the energy without double-precision rounding
        scale = abs(state.energy)
        if state.tail_error > 1e-3 * tol * scale and cutoff_extra < 60:
            cutoff_extra += 4 + math.log(state.tail_error / (1e-3 * tol * scale))
            state.history = None
            prev_levels = prev_levels[:level] + [state]
            continue
        state.coarse = states[-1] if states else None
        if state.coarse is not None:
            state.coarse.coarse = None  # keep two levels: enough for derivative errors
        states.append(state)
        r_eff = rule.effective_radius(state, radius) or r_eff
        if len(states) >= 2:
            fine, coarse = states[-1], states[-2]
            error = (abs(fine.energy - coarse.energy) + fine.iteration_error + coarse.iteration_error
                     + fine.rounding_error + fine.tail_error)
            if error <= tol * scale or level >= MAX_LEVEL:
                break
            if fine.rounding_error + fine.iteration_error > 0.5 * tol * scale:
                break  # the floor of rounding: finer grids cannot help
        level += 1
    fine = states[-1]
    fine.levels = states
    status = Status.CONVERGED if error <= tol * scale else Status.NOT_CONVERGED
    if status is Status.CONVERGED:
        message = f"converged in {time.perf_counter() - t0:.3g} s"
    elif fine.rounding_error + fine.iteration_error > 0.5 * tol * scale:
        floor = (fine.rounding_error + fine.iteration_error) / scale
        message = (f"the conditioning limits the relative accuracy to {floor:.1e} here (next to a "
                   f"branch point rounding is amplified like dE/dR); tol {tol:g} cannot be met: "
                   f"ask tol >= {min(1e-2, 4 * floor):.0e}")
    else:
        message = f"error estimate {error:.3g} above the tolerance after {MAX_LEVEL} refinements"
    ok = status is Status.CONVERGED
    return SolveResult(**base, status=status, energy=fine.energy if ok else np.nan,
                       error=error if ok else np.nan, momentum=fine.momentum, message=message,
                       iterations=iterations, residual=fine.residual,
                       effective_radius=rule.effective_radius(fine, radius) or np.nan,
                       fold_indicator=fine.fold_indicator, grid=fine.grid,
                       rapidity_grid=fine.grid.t, pseudo_energies=fine.eps, _state=fine)


def _clear(verdict, radius, tol):
    """A turning point this far before the requested point cannot move past it on a finer
    grid (the fold's position is as accurate as the energies, ~tol): no need to confirm."""
    target = radius if verdict.parameter == "radius" else 1.0
    return abs(target - verdict.p_fold) > max(1e-6, 1e4 * tol) * abs(target)


def _fold_words(v):
    if v.parameter == "radius":
        return f"the branch turns back at R = {v.p_fold:.12g} on this grid"
    return f"the branch of the undeformed theory folds at {v.p_fold:.9g} times the requested couplings"


def _no_real_solution(base, verdicts, iterations, radius):
    v = verdicts[-1]
    spread = abs(verdicts[-1].p_fold - verdicts[-2].p_fold) if len(verdicts) >= 2 else math.nan
    target = radius if v.parameter == "radius" else 1.0
    margin = abs(target - v.p_fold)
    if math.isfinite(spread) and margin <= 2 * spread + 64 * _EPS * abs(target):
        return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                           message=f"within the grids' uncertainty of the branch point "
                                   f"({_fold_words(v)}, +- {spread:.1e}): too close to decide")
    return SolveResult(**base, status=Status.NO_REAL_SOLUTION, iterations=iterations,
                       message=f"no real solution: {_fold_words(v)}"
                               + (f" (two grids agree to {spread:.1e})" if math.isfinite(spread) else ""))


def _too_close(verdict, states):
    return (f"one grid has a real solution here and a finer one does not ({_fold_words(verdict)}): "
            f"the point lies closer to the branch point than the grids resolve")


def _effective_radius(state, radius, deformation):
    """R + alpha E for a TTbar-deformed ground state (exact for P = 0), else None."""
    if state is None or not deformation.is_ttbar:
        return None
    return radius + deformation.alpha * state.energy


def solve_radii(model, radii, deformation=None, *, tol=1e-12, start=None):
    """Solve a sequence of radii in order, each warm-started from the last converged one."""
    radii = list(radii)
    plain = [float(R) if (type(R) is float or type(R) is np.float64) and 0 < R < math.inf else None
             for R in radii]  # the radii `_run` may take (`_checked` decides about the others)
    results = []
    rule = None
    i = 0
    while i < len(radii):
        R, tol_, deformation_, prev = _checked(model, radii[i], deformation, tol, start)
        if rule is None:  # one grid rule for the scan: its grids are looked up, not rebuilt
            rule = _GridRule(model, deformation_, tol_)
        run = _run(model, plain, i, deformation_, tol_, prev, rule) if prev is not None else ()
        if run:
            results += run
            start = run[-1]
            i += len(run)
            continue
        res = _solve_point(model, R, deformation_, tol_, prev, rule)
        if res.converged:
            start = res
        results.append(res)
        i += 1
    return results


#: the most points `_run` solves in one compiled call
RUN_POINTS = 256


def _keys(rule, seed, level, key, low, high):
    """[first, last] octave keys around ``key`` (`_GridRule.grid_of_key`), within [low, high],
    whose grid of ``level`` is the seed's once `_keep_wider` has looked at it."""
    g = seed.grid

    def same(k):
        grid = rule.grid_of_key(k, level, 0.0)
        return grid is g or grid == g or _keep_wider(grid, seed) is g

    if not same(key):
        return None
    lo = hi = key
    while hi < high and same(hi + 1):
        hi += 1
    while lo > low and same(lo - 1):
        lo -= 1
    return lo, hi


def _run(model, radii, i, deformation, tol, prev, rule):
    """The points radii[i:] that `_solve_point` would solve on the previous point's two grids
    with two warm-started levels and nothing else (the common case along a scan), solved in
    one compiled call (`kernels.dense.solve_run`): the same compiled iteration from the same
    starts, so the same numbers; the results are built from its buffers. Returns the results
    of the leading points it could take (an empty list where it takes none; `_solve_point`
    solves that point)."""
    levels = prev.levels
    if (rule.tails is not None or levels is None or len(levels) != 2 or prev is not levels[1]
            or i + 1 >= len(radii)):
        return []
    s0, s1 = levels
    ops0, terms0 = rule.operators(s0.grid)
    ops1, terms1 = rule.operators(s1.grid)
    if not (ops0.dense and ops1.dense) or ops0.trivial != ops1.trivial:
        return []
    M0, M1 = ops0.n * ops0.N, ops1.n * ops1.N
    if M1 > _dense.SMALL:  # many species: the compiled iteration dominates, the Python around
        return []          # it does not (E8: one point in _solve_point as before)
    for seed, M in ((s0, M0), (s1, M1)):
        if (seed.history is None or seed.A is None or seed.A.shape != (M, M)
                or not (seed.deformation is deformation or seed.deformation == deformation)):
            return []
    radii_ = radii[i:i + RUN_POINTS]
    if None in radii_:
        radii_ = radii_[:radii_.index(None)]
    if not radii_:
        return []
    R = radii_[0]
    r_eff = rule.effective_radius(prev, R)
    r_eff = r_eff if r_eff and r_eff > 0 else R
    r_eff1 = rule.effective_radius(s0, R) or r_eff
    if not r_eff1 > 0:
        return []
    # the keys the run may meet: its radii shifted as at its first point, and a margin
    keys = []
    for a in (r_eff, r_eff1):
        span = [x + a - R for x in (min(radii_), max(radii_))]
        keys.append((math.floor(64 * math.log2(a)),
                     math.floor(64 * math.log2(span[0])) - 2 if span[0] > 0 else -10 ** 6,
                     math.floor(64 * math.log2(span[1])) + 2 if span[1] > 0 else 10 ** 6))
    keys0 = _keys(rule, s0, 0, *keys[0])
    keys1 = _keys(rule, s1, 1, *keys[1]) if keys0 is not None else None
    if keys1 is None:
        return []
    t0 = time.perf_counter()
    P = len(radii_)
    n, H = ops0.n, _dense.HISTORY
    U0, V0, c, Uf0, Vf0 = terms0
    U1, V1, _, Uf1, Vf1 = terms1
    r = c.size
    out0, out1 = np.empty((P, 4 + H, M0)), np.empty((P, 4 + H, M1))
    small0, small1 = np.empty((P, r + H)), np.empty((P, r + H))
    rec0, rec1 = np.empty((P, _dense.RUN_FIELDS)), np.empty((P, _dense.RUN_FIELDS))
    trivial = ops0.trivial
    K0 = ops0.matrix if not trivial else _NO_MATRIX
    K1 = ops1.matrix if not trivial else _NO_MATRIX
    ran, A0, A1 = _dense.solve_run(
        K0, ops0.drive_flat, Uf0, Vf0, ops0.wE_flat, ops0.wP_flat, *s0.history, s0.A, out0, small0,
        rec0, np.array(keys0, dtype=float),
        K1, ops1.drive_flat, Uf1, Vf1, ops1.wE_flat, ops1.wP_flat, *s1.history, s1.A, out1, small1,
        rec1, np.array(keys1, dtype=float),
        c, n, ops0.N, ops1.N, np.array(radii_), prev.energy,
        rule.ttbar if rule.ttbar is not None else math.nan, not deformation.is_zero, rule.sign,
        tol, 60, trivial, AMPLIFIED, POLISH_FRACTION, 1e-3)
    # the octave keys next to an integer again, as `_solve_point` takes them (the compiled
    # log2 may round the other way there): a point whose key falls outside is solved in full
    done = ran
    ttbar = rule.ttbar
    for j in np.flatnonzero(rec0[:ran, 10] + rec1[:ran, 10]).tolist():
        R = radii_[j]
        a = R + ttbar * (rec1[j - 1, 5] if j else prev.energy) if ttbar is not None else None
        a = a if a and a > 0 else R
        b = (R + ttbar * rec0[j, 5] if ttbar is not None else None) or a
        if not (keys0[0] <= math.floor(64 * math.log2(a)) <= keys0[1]
                and keys1[0] <= math.floor(64 * math.log2(b)) <= keys1[1]):
            done = j
            break
    if not done:
        return []
    if done < ran:  # the inverses of J0 of the last point kept: those it started from
        A0, A1 = s0.A, s1.A
    # (rows past ``done`` were never written: np.empty leaves their pages unmapped, so the
    # results' views keep no more memory than they use)
    each = (time.perf_counter() - t0) / done
    message = f"converged in {each:.3g} s"
    levels = []
    for grid, out, small, rec, A_old, A_new in ((s0.grid, out0, small0, rec0, s0.A, A0),
                                                (s1.grid, out1, small1, rec1, s1.A, A1)):
        out, small = out[:done], small[:done]
        views = out.reshape(done, 4 + H, n, out.shape[2] // n)
        levels.append((grid, rec[:done].tolist(), list(views[:, 0]), list(views[:, 3]),
                       list(views[:, 1]), list(views[:, 2]), list(small[:, :r]), list(small[:, r:]),
                       list(out[:, 4:]), A_old, A_new))
    name, couplings, coupling = model.name, deformation.couplings, model.coupling
    g1 = s1.grid
    t1 = g1.t
    results = []
    for j in range(done):
        R = radii_[j]
        states = []
        for grid, rec, eps, dressing, L, dL, scalars, hr, hg, A_old, A_new in levels:
            its, res, dE, fold, rounding, E, P_, tail, k, _, _ = rec[j]
            k = int(k)
            states.append(State(  # positional (the field order of State): quicker
                grid, R, deformation, eps[j], dressing[j], scalars[j], E, P_, dE, rounding, tail,
                fold, res, int(its), None, None, L[j], dL[j], None, A_new if j == done - 1 else A_old,
                (hr[j], hg[j]) if k == H else (hr[j][:k], hg[j][:k]), None, model))
        coarse, fine = states
        fine.coarse = coarse
        fine.levels = states
        error = (abs(fine.energy - coarse.energy) + fine.iteration_error + coarse.iteration_error
                 + fine.rounding_error + fine.tail_error)
        results.append(SolveResult(  # positional (the field order of SolveResult): quicker
            name, R, dict(couplings), Status.CONVERGED, coupling, fine.energy, error,
            fine.momentum, message, fine.iterations + coarse.iterations, fine.residual,
            R + ttbar * fine.energy if ttbar is not None else np.nan, fine.fold_indicator, g1,
            t1, fine.eps, (), (), fine))
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
    if not isinstance(result, SolveResult):
        raise TypeError(f"result must be a SolveResult, got {type(result).__name__}")
    if not result.converged:
        raise ValueError(f"result: derivatives need a converged point, got status {result.status.value}")
    if not isinstance(result._state, State):
        raise ValueError("result: derivatives are available for ground states only (this "
                         "result is an excited level)")
    if isinstance(spins, (str, bytes)) or not hasattr(spins, "__iter__"):
        raise TypeError(f"spins must be a sequence of spins, e.g. (1, 3), got {spins!r}")
    if not isinstance(second, (bool, np.bool_)):
        raise TypeError(f"second must be True or False, got {second!r}")
    fine = result._state
    d_fine = fine.derivatives(spins, second)
    d_coarse = fine.coarse.derivatives(spins, second) if fine.coarse is not None else None
    out = {key: float(value) for key, value in d_fine.items()}
    for key, value in d_fine.items():
        floor = 64 * _EPS * abs(value) * np.sqrt(fine.eps.size)
        out[key + "_error"] = float((abs(value - d_coarse[key]) if d_coarse else abs(value)) + floor)
    return out  # plain Python floats


def flow_residual(result):
    """The ground state's Burgers-equation residual d_alpha E - E d_R E - P^2/R (P = 0 here),
    from exact derivatives, with its error estimate and the scale |E dE/dR|.

    Returns plain Python floats: ``residual`` (absolute, signed) and its ``error``, ``scale``
    = |E dE/dR|, ``relative_residual`` and ``relative_error`` (both over the scale; NaN when
    the scale is 0), and the derivatives of `energy_derivatives` (``dE_dR``, ``dE_dalpha1``
    and their errors)."""
    d = energy_derivatives(result, spins=(1,))
    E, P, R = float(result.energy), float(result.momentum), float(result.radius)
    residual = d["dE_dalpha1"] - E * d["dE_dR"] - P * P / R
    error = d["dE_dalpha1_error"] + abs(E) * d["dE_dR_error"] + float(result.error) * abs(d["dE_dR"])
    scale = abs(E * d["dE_dR"])
    relative = (lambda x: x / scale if scale > 0 else math.nan)  # noqa: E731
    return {"residual": residual, "error": error, "scale": scale,
            "relative_residual": relative(residual), "relative_error": relative(error), **d}
