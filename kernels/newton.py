"""Newton's method for the dense discretised TBA equations, compiled as one routine.

The equations, flattened over (species, grid point) to vectors of length M:

    F(e) = e - nu + K L(e) + U^T (c * (V L(e)))

with K the (M x M) kernel matrix and r rank-one terms (rows of U and V, coefficients c).
The Jacobian J = J0 + U^T C (V diag(L'))  with  J0 = 1 + K diag(L') is solved with the
Woodbury formula: one LU solve of J0 with r + 1 right-hand sides and an r x r system,
whose matrix (the capacitance) has determinant det J / det J0 (the fold indicator).

A step is taken with backtracking on max |F|. The iteration stops before applying a step
once the energy change that step would make, |wE . (L' delta)|, is below
max(tol / 100, 8 eps) |E| and the step is small (max |delta| < 1e-6 or the residual is at
the rounding floor): that change is returned as the iteration error.
"""

import math

import numba
import numpy as np

from kernels.statistics import occupation_terms

#: status codes of `dense_newton`
CONVERGED, MAX_ITERATIONS, LINE_SEARCH_FAILED, OUTSIDE_DOMAIN, SINGULAR = 0, 1, 2, 3, 4

_EPS = 2.220446049250313e-16


@numba.njit(cache=True, nogil=True)
def _residual(K, nu, U, V, c, e, L, trivial):
    F = e - nu
    if not trivial:
        F += K @ L
    for k in range(c.size):
        F += (c[k] * np.dot(V[k], L)) * U[k]
    return F


@numba.njit(cache=True, nogil=True)
def _step(K, U, V, c, dL, F, trivial):
    """Newton step delta = -J^{-1} F and the capacitance matrix."""
    M = F.size
    r = c.size
    J0 = np.eye(M)
    if not trivial:
        for i in range(M):
            for j in range(M):
                J0[i, j] += K[i, j] * dL[j]
    B = np.empty((M, r + 1))
    B[:, 0] = -F
    for k in range(r):
        B[:, k + 1] = U[k]
    X = np.linalg.solve(J0, B)
    delta = X[:, 0].copy()
    cap = np.eye(r)
    if r:
        CVd = np.empty((r, M))
        for k in range(r):
            CVd[k] = c[k] * V[k] * dL
        Z = np.ascontiguousarray(X[:, 1:])
        cap += CVd @ Z
        w = np.linalg.solve(cap, CVd @ delta)
        delta -= Z @ w
    return delta, cap


@numba.njit(cache=True, nogil=True)
def dense_newton(K, nu, U, V, c, wE, e0, sign, tol, maxiter, trivial):
    """Solve F(e) = 0 from ``e0``. Returns
    (e, L, dL, iterations, residual, iteration_error, status, fold_indicator)."""
    M = e0.size
    e = e0.copy()
    L = np.empty(M)
    dL = np.empty(M)
    if occupation_terms(e, sign, L, dL) != 0:
        return e, L, dL, 0, np.inf, np.inf, OUTSIDE_DOMAIN, np.nan
    F = _residual(K, nu, U, V, c, e, L, trivial)
    r = np.max(np.abs(F))
    floor = 64 * _EPS * max(1.0, np.max(np.abs(nu)))
    dE = np.inf
    L_new = np.empty(M)
    dL_new = np.empty(M)
    for it in range(maxiter + 1):
        delta, cap = _step(K, U, V, c, dL, F, trivial)
        fold = np.linalg.det(cap) if c.size else 1.0
        if not np.all(np.isfinite(delta)):
            return e, L, dL, it, r, dE, SINGULAR, fold
        dE = abs(np.sum(wE * dL * delta))
        small = np.max(np.abs(delta)) < 1e-6 or r <= floor
        if small and dE <= max(1e-2 * tol, 8 * _EPS) * abs(np.dot(wE, L)):
            return e, L, dL, it, r, dE, CONVERGED, fold
        if it == maxiter:
            break
        lam = 1.0
        while True:
            e_new = e + lam * delta
            if occupation_terms(e_new, sign, L_new, dL_new) == 0:
                F_new = _residual(K, nu, U, V, c, e_new, L_new, trivial)
                r_new = np.max(np.abs(F_new))
                if r_new <= (1 - 0.25 * lam) * r or r_new <= floor:
                    break
            lam *= 0.5
            if lam < 1e-4:
                status = CONVERGED if r <= 1e3 * floor else LINE_SEARCH_FAILED
                return e, L, dL, it, r, dE, status, fold
        e = e_new
        L[:] = L_new
        dL[:] = dL_new
        F = F_new
        r = r_new
    return e, L, dL, maxiter, r, dE, MAX_ITERATIONS, np.nan
