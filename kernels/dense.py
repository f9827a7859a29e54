"""Newton's method for the dense discretised TBA equations, compiled, with a reusable inverse.

The equations, flattened over (species, grid point) to vectors of length M:

    F(e) = e - nu + K L(e) + U^T (c * (V L(e)))

with K the (M x M) kernel matrix and r rank-one terms (rows of U and V, coefficients c: the
separable CDD factors). The Jacobian is J = J0 + U^T CVd with J0 = 1 + K diag(L') and
CVd = diag(c) V diag(L'). It is applied through the Woodbury formula,

    J^{-1} = A - Z cap^{-1} CVd A,    A = J0^{-1},  Z = A U^T,  cap = 1 + CVd Z,

so that only J0 is ever inverted: it stays well conditioned where J is singular (at a fold
of the deformed equations), and det(cap) = det J / det J0 is the fold indicator.

Chord iteration: ``A`` may be the inverse of J0 at another point (the previous radius of a
scan, on the same grid). The iteration then converges linearly; it is replaced by the inverse
at the current iterate (a Newton step) as soon as the residual falls by less than
``CHORD_RATE`` per step, and Newton with backtracking on max |F| takes over.

Stopping rule: before a step is applied, the energy change it would make, dE = |wE . (L' delta)|,
is compared with max(tol / 100, 8 eps) |E|; once the step is also small (max |delta| < 1e-6 or
the residual at rounding level) the iteration stops and dE, divided by (1 - rate) for a chord
step, is the iteration error. Near a fold rounding errors of the equations are amplified by
J^{-1}: `rounding_error` propagates them to the energy through the adjoint solution
lambda = J^{-T} (L' wE), so that the stopping rule and the error estimate see the real floor.
"""

import numba
import numpy as np

from kernels.statistics import occupation_terms

#: status codes of `newton`
CONVERGED, MAX_ITERATIONS, LINE_SEARCH_FAILED, OUTSIDE_DOMAIN, SINGULAR = 0, 1, 2, 3, 4
#: a chord step must reduce max |F| at least by this factor, else J0 is inverted afresh
CHORD_RATE = 0.25

_EPS = 2.220446049250313e-16


@numba.njit(cache=True, nogil=True)
def residual(K, nu, U, V, c, e, L, trivial):
    """F(e) given L = L(e)."""
    F = e - nu
    if not trivial:
        F += K @ L
    for k in range(c.size):
        F += (c[k] * np.dot(V[k], L)) * U[k]
    return F


@numba.njit(cache=True, nogil=True)
def jacobian0(K, dL, trivial):
    """J0 = 1 + K diag(L')."""
    M = dL.size
    J0 = np.eye(M)
    if not trivial:
        for i in range(M):
            for j in range(M):
                J0[i, j] += K[i, j] * dL[j]
    return J0


@numba.njit(cache=True, nogil=True)
def inverse_j0(K, dL, trivial):
    """J0^{-1} = (1 + K diag(L'))^{-1}, C-contiguous."""
    return np.ascontiguousarray(np.linalg.inv(jacobian0(K, dL, trivial)))


@numba.njit(cache=True, nogil=True)
def apply_j0(K, dL, x, trivial):
    """J0 x."""
    if trivial:
        return x.copy()
    return x + K @ (dL * x)


@numba.njit(cache=True, nogil=True)
def capacitance(U, V, c, dL, A):
    """(CVd, Z = A U^T, cap = 1 + CVd Z) for the Woodbury formula."""
    r = c.size
    M = dL.size
    CVd = np.empty((r, M))
    for k in range(r):
        CVd[k] = c[k] * V[k] * dL
    Z = np.ascontiguousarray(A @ U.T) if r else np.zeros((M, 0))
    cap = np.eye(r) + CVd @ Z
    return CVd, Z, cap


@numba.njit(cache=True, nogil=True)
def refine_capacitance(K, U, dL, A, CVd, Z, trivial, sweeps):
    """Z -> J0(dL)^{-1} U^T by iterative refinement with an approximate inverse A (a chord
    inverse from a neighbouring point): Z += A (U^T - J0 Z), at most ``sweeps`` times, until
    the correction is at rounding level. Returns (Z, cap, sweeps used)."""
    r = Z.shape[1]
    used = 0
    for k in range(r):
        z = np.ascontiguousarray(Z[:, k])
        for it in range(sweeps):
            dz = A @ (U[k] - apply_j0(K, dL, z, trivial))
            z = z + dz
            used = max(used, it + 1)
            if np.max(np.abs(dz)) <= 4 * _EPS * np.max(np.abs(z)):
                break
        Z[:, k] = z
    cap = np.eye(r) + CVd @ Z
    return Z, cap, used


@numba.njit(cache=True, nogil=True)
def woodbury(A, CVd, Z, cap, b):
    """J^{-1} b with J^{-1} = A - Z cap^{-1} CVd A."""
    y = A @ b
    if CVd.shape[0]:
        y = y - Z @ np.linalg.solve(cap, CVd @ y)
    return y


@numba.njit(cache=True, nogil=True)
def woodbury_transposed(A, CVd, Z, cap, b):
    """J^{-T} b with J^{-T} = A^T - A^T CVd^T cap^{-T} Z^T."""
    x = b.copy()
    if CVd.shape[0]:
        x = x - CVd.T @ np.linalg.solve(cap.T, Z.T @ b)
    return A.T @ x


#: safety factor of the rounding estimate over the root-mean-square effect of rounding
ROUNDING_SAFETY = 5.0


@numba.njit(cache=True, nogil=True)
def rounding_error(K, nu, U, c, wE, e, L, dL, A, CVd, Z, cap, S, trivial):
    """The effect on E of rounding errors in the equations and in the energy sum:
    ROUNDING_SAFETY * sqrt(sum_i (lambda_i dF_i)^2) + 4 eps sum |wE L|, lambda = J^{-T} (L' wE).

    dF_i = eps (|e_i| + |nu_i| + sum_j |K_ij L_j| + |terms_i|) is the size of the rounding of
    F_i as computed; rounding errors of different equations are independent, so their effect
    adds in quadrature, and the factor 5 covers the tail of that distribution (measured
    rounding errors lie 2 to 100 times below the estimate, tests/test_fold.py). Near a fold
    lambda grows like the inverse square root of the distance: the amplification of rounding
    by dE/dR that the error estimate must carry."""
    M = e.size
    lam = woodbury_transposed(A, CVd, Z, cap, dL * wE)
    absL = np.abs(L)
    total = 0.0
    for i in range(M):
        sep = 0.0
        for k in range(c.size):
            sep += abs(c[k] * S[k] * U[k, i])
        kl = 0.0
        if not trivial:
            for j in range(M):
                kl += abs(K[i, j]) * absL[j]
        dF = _EPS * (abs(e[i]) + abs(nu[i]) + kl + sep)
        total += (lam[i] * dF) ** 2
    return ROUNDING_SAFETY * np.sqrt(total) + 4 * _EPS * np.sum(np.abs(wE * L))


@numba.njit(cache=True, nogil=True)
def newton(K, nu, U, V, c, wE, e0, sign, tol, maxiter, A0, have_A, trivial):
    """Solve F(e) = 0 from ``e0`` with chord steps on ``A0`` (if ``have_A``) and Newton steps.

    Returns (e, L, dL, iterations, residual, iteration_error, status, fold_indicator,
    rounding, A, inversions): ``A`` the inverse of J0 used last (for the next point's chord
    steps), ``inversions`` how many times J0 was inverted."""
    M = e0.size
    r_ = c.size
    e = e0.copy()
    L = np.empty(M)
    dL = np.empty(M)
    A = A0
    inversions = 0
    nan = np.nan
    if occupation_terms(e, sign, L, dL) != 0:
        return e, L, dL, 0, np.inf, np.inf, OUTSIDE_DOMAIN, nan, nan, A, inversions
    F = residual(K, nu, U, V, c, e, L, trivial)
    r = np.max(np.abs(F))
    floor = 64 * _EPS * max(1.0, np.max(np.abs(nu)))
    fresh = False  # A is the inverse of J0 at the current iterate
    if not have_A:
        A = inverse_j0(K, dL, trivial)
        inversions += 1
        fresh = True
    rate = 0.0
    L_new = np.empty(M)
    dL_new = np.empty(M)
    dE = np.inf
    rounding = nan
    for it in range(maxiter + 1):
        CVd, Z, cap = capacitance(U, V, c, dL, A)
        y = A @ F
        if r_:
            w = np.linalg.solve(cap, CVd @ y)
            delta = -(y - Z @ w)
        else:
            delta = -y
        if not np.all(np.isfinite(delta)):
            return e, L, dL, it, r, dE, SINGULAR, nan, nan, A, inversions
        E = np.dot(wE, L)
        dE_last = dE
        dE = abs(np.sum(wE * dL * delta)) / (1.0 - rate)
        small = np.max(np.abs(delta)) < 1e-6 or r <= floor
        done = small and dE <= max(1e-2 * tol, 8 * _EPS) * abs(E)
        if not done and r <= 1e3 * floor:  # residual at rounding level: is dE the floor?
            if not (rounding == rounding):
                if not fresh:
                    Z, cap, _ = refine_capacitance(K, U, dL, A, CVd, Z, trivial, 20)
                S = V @ L if r_ else np.zeros(0)
                rounding = rounding_error(K, nu, U, c, wE, e, L, dL, A, CVd, Z, cap, S, trivial)
            # at the floor the steps are amplified rounding noise: stop once they stop shrinking;
            # the iterate's error is then the rounding the estimate covers, and only the part
            # of the step beyond it counts as iteration error
            done = dE <= 2.0 * rounding and dE > 0.5 * dE_last
            if done:
                dE = max(dE - rounding, 0.0)
        if done:
            if not fresh:
                Z, cap, _ = refine_capacitance(K, U, dL, A, CVd, Z, trivial, 20)
            fold = np.linalg.det(cap) if r_ else 1.0
            if not (rounding == rounding):
                S = V @ L if r_ else np.zeros(0)
                rounding = rounding_error(K, nu, U, c, wE, e, L, dL, A, CVd, Z, cap, S, trivial)
            return e, L, dL, it, r, dE, CONVERGED, fold, rounding, A, inversions
        if it == maxiter:
            break
        lam = 1.0
        accepted = False
        while True:
            e_new = e + lam * delta
            if occupation_terms(e_new, sign, L_new, dL_new) == 0:
                F_new = residual(K, nu, U, V, c, e_new, L_new, trivial)
                r_new = np.max(np.abs(F_new))
                if r_new <= (1 - 0.25 * lam) * r or r_new <= floor:
                    accepted = True
                    break
            if not fresh:  # a poor chord step: invert J0 here and try a Newton step
                break
            lam *= 0.5
            if lam < 1e-4:
                break
        if not accepted:
            if not fresh:
                A = inverse_j0(K, dL, trivial)
                inversions += 1
                fresh, rate = True, 0.0
                continue
            if r <= 1e3 * floor:  # stagnation at rounding level is convergence
                CVd, Z, cap = capacitance(U, V, c, dL, A)
                fold = np.linalg.det(cap) if r_ else 1.0
                S = V @ L if r_ else np.zeros(0)
                rounding = rounding_error(K, nu, U, c, wE, e, L, dL, A, CVd, Z, cap, S, trivial)
                return e, L, dL, it, r, max(dE, rounding), CONVERGED, fold, rounding, A, inversions
            return e, L, dL, it, r, dE, LINE_SEARCH_FAILED, nan, nan, A, inversions
        step_rate = r_new / r if r > 0 else 0.0
        e = e_new
        L[:] = L_new
        dL[:] = dL_new
        F = F_new
        r = r_new
        if fresh:
            fresh = False  # A now belongs to the previous iterate: chord from here on
            rate = 0.0
        elif lam == 1.0:
            rate = max(rate, min(step_rate, 0.9))
        if not fresh and lam == 1.0 and step_rate > CHORD_RATE and r > floor:
            A = inverse_j0(K, dL, trivial)
            inversions += 1
            fresh, rate = True, 0.0
    return e, L, dL, maxiter, r, dE, MAX_ITERATIONS, nan, nan, A, inversions


@numba.njit(cache=True, nogil=True)
def solve_linear(K, U, V, c, dL, A, b, trivial, maxiter):
    """J x = b by iterative refinement of the Woodbury form with an approximate inverse A of
    J0 (one sweep suffices when A is the inverse at this very point). Returns (x, converged)."""
    CVd, Z, cap = capacitance(U, V, c, dL, A)
    Z, cap, _ = refine_capacitance(K, U, dL, A, CVd, Z, trivial, 20)
    x = woodbury(A, CVd, Z, cap, b)
    change = np.inf
    for _ in range(maxiter):
        res = b - apply_j0(K, dL, x, trivial)
        for k in range(c.size):
            res -= np.dot(CVd[k], x) * U[k]
        dx = woodbury(A, CVd, Z, cap, res)
        x = x + dx
        new = np.max(np.abs(dx))
        if new <= 4 * _EPS * np.max(np.abs(x)) or new >= change:
            return x, new <= 1e-10 * max(np.max(np.abs(x)), 1e-300)
        change = new
    return x, change <= 1e-10 * max(np.max(np.abs(x)), 1e-300)


@numba.njit(cache=True, nogil=True)
def solve_j0(K, dL, A, b, trivial, maxiter):
    """J0 x = b by iterative refinement with an approximate inverse A.
    Returns (x, converged, sweeps)."""
    x = A @ b
    change = np.inf
    for it in range(maxiter):
        dx = A @ (b - apply_j0(K, dL, x, trivial))
        x = x + dx
        new = np.max(np.abs(dx))
        if new <= 4 * _EPS * np.max(np.abs(x)) or new >= change:
            return x, new <= 1e-10 * max(np.max(np.abs(x)), 1e-300), it + 1
        change = new
    return x, change <= 1e-10 * max(np.max(np.abs(x)), 1e-300), maxiter
