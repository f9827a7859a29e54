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
scan, on the same grid). The iteration then converges linearly; J0 is inverted afresh at the
current iterate (a Newton step) as soon as a chord step reduces max |F| by less than a factor
``1 / CHORD_RATE`` (``1 / CHORD_RATE_LARGE`` above SMALL unknowns), and Newton with
backtracking on max |F| takes over.

Stopping rule: before a step is applied, the energy change it would make, dE = |wE . (L' delta)|,
is compared with max(tol / 10, 8 eps) |E|; once the step is also small (max |delta| < 1e-6 or
the residual at rounding level) the iteration stops and dE, divided by (1 - rate) for a chord
step, is the iteration error. Near a fold rounding errors of the equations are amplified by
J^{-1}: `rounding_error` propagates them to the energy through the adjoint solution
lambda = J^{-T} (L' wE), so that the stopping rule and the error estimate see the real floor.

Small systems (M <= ``SMALL``, every single-species grid) use loops and a Gauss-Jordan inverse
written here, which beat the call overhead of BLAS and LAPACK at that size; larger ones call
them (numpy's dot and inv).
"""

import numba
import numpy as np

from kernels.statistics import occupation_terms

#: status codes of `newton`
CONVERGED, MAX_ITERATIONS, LINE_SEARCH_FAILED, OUTSIDE_DOMAIN, SINGULAR = 0, 1, 2, 3, 4
#: a chord step must reduce max |F| at least by this factor, else J0 is inverted afresh
CHORD_RATE = 0.1
#: the same for systems above SMALL (many species): there an inversion costs as much as
#: hundreds of chord steps (E8, M = 264-456: 2-16 ms against 30 us), so slower chord steps
#: are kept (E8 scan of benchmarks/bench_scan.py, 40 radii: 4.1 ms of CPU per point with 0.1,
#: 2.9 with 0.3, 0.5 or 0.7; 0.3 keeps the iteration error's 1 / (1 - rate) small)
CHORD_RATE_LARGE = 0.3
#: up to this size, matrix-vector products and inverses are the loops of this module
SMALL = 128
#: Newton steps taken with the residual at rounding level before the iterate is returned
FLOOR_STEPS = 8
#: safety factor of the rounding estimate over the root-mean-square effect of rounding
ROUNDING_SAFETY = 5.0
#: radii a grid level keeps along a scan for its extrapolated start (degree HISTORY - 1): on
#: the sinh-Gordon scan of benchmarks/ six radii take 1.8 chord steps per level, three 3.9
HISTORY = 6

_EPS = 2.220446049250313e-16
#: floating-point freedoms of the small loops: reassociation (so that the sums of the
#: matrix-vector products vectorise) and fused multiply-adds. No assumptions about NaN or
#: infinity: the iteration tests for them. A reassociated sum has at most the rounding error
#: of the sequential one that `rounding_error` allows for.
_FAST = {"reassoc", "contract"}


# -- linear algebra building blocks ---------------------------------------------------------

@numba.njit(cache=True, nogil=True, fastmath=_FAST)
def _mv(A, x, out):
    """out = A x (loops for small systems, BLAS above SMALL)."""
    M, N = A.shape
    if M > SMALL:
        y = np.dot(A, x)
        for i in range(M):  # (element by element: a slice assignment compiles numba's
            out[i] = y[i]   # shape-mismatch message formatting, seconds of first-run compile)
        return out
    for i in range(M):
        s = 0.0
        for j in range(N):
            s += A[i, j] * x[j]
        out[i] = s
    return out


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
def _mtv(A, x, out):
    """out = A^T x."""
    M, N = A.shape
    if M > SMALL:
        y = np.dot(A.T, x)
        for j in range(N):
            out[j] = y[j]
        return out
    for j in range(N):
        out[j] = 0.0
    for i in range(M):
        xi = x[i]
        for j in range(N):
            out[j] += A[i, j] * xi
    return out


@numba.njit(cache=True, nogil=True)
def _gauss_jordan(B):
    """In-place inverse of B by Gauss-Jordan elimination with partial pivoting (small B).
    Returns False if a pivot vanishes."""
    M = B.shape[0]
    perm = np.arange(M)
    for k in range(M):
        p = k
        best = abs(B[k, k])
        for i in range(k + 1, M):
            if abs(B[i, k]) > best:
                best = abs(B[i, k])
                p = i
        if best == 0.0:
            return False
        if p != k:
            for j in range(M):
                tmp = B[k, j]
                B[k, j] = B[p, j]
                B[p, j] = tmp
            tmp_i = perm[k]
            perm[k] = perm[p]
            perm[p] = tmp_i
        inv = 1.0 / B[k, k]
        B[k, k] = 1.0
        for j in range(M):
            B[k, j] *= inv
        for i in range(M):
            if i != k:
                f = B[i, k]
                if f != 0.0:
                    B[i, k] = 0.0
                    for j in range(M):
                        B[i, j] -= f * B[k, j]
    # undo the row permutation on the columns of the inverse
    out = np.empty_like(B)
    for j in range(M):
        pj = perm[j]
        for i in range(M):
            out[i, pj] = B[i, j]
    for i in range(M):
        for j in range(M):
            B[i, j] = out[i, j]
    return True


@numba.njit(cache=True, nogil=True)
def _small_solve(C, b):
    """C x = b for the r x r capacitance (r = 2 per CDD spin): Gaussian elimination."""
    r = b.size
    A = C.copy()
    x = b.copy()
    for k in range(r):
        p = k
        for i in range(k + 1, r):
            if abs(A[i, k]) > abs(A[p, k]):
                p = i
        if p != k:
            for j in range(r):
                t = A[k, j]
                A[k, j] = A[p, j]
                A[p, j] = t
            t = x[k]
            x[k] = x[p]
            x[p] = t
        for i in range(k + 1, r):
            f = A[i, k] / A[k, k]
            for j in range(k, r):
                A[i, j] -= f * A[k, j]
            x[i] -= f * x[k]
    for k in range(r - 1, -1, -1):
        s = x[k]
        for j in range(k + 1, r):
            s -= A[k, j] * x[j]
        x[k] = s / A[k, k]
    return x


# -- the equations and their Jacobian ------------------------------------------------------

@numba.njit(cache=True, nogil=True, fastmath=_FAST)
def _residual_into(K, nu, U, V, c, e, L, trivial, work, F):
    M = e.size
    if not trivial:
        _mv(K, L, work)
        for i in range(M):
            F[i] = e[i] - nu[i] + work[i]
    else:
        for i in range(M):
            F[i] = e[i] - nu[i]
    for k in range(c.size):
        s = 0.0
        for i in range(M):
            s += V[k, i] * L[i]
        s *= c[k]
        for i in range(M):
            F[i] += s * U[k, i]
    return F


@numba.njit(cache=True, nogil=True)
def residual(K, nu, U, V, c, e, L, trivial):
    """F(e) given L = L(e)."""
    M = e.size
    return _residual_into(K, nu, U, V, c, e, L, trivial, np.empty(M), np.empty(M))


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
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
    """J0^{-1} = (1 + K diag(L'))^{-1}, C-contiguous (the identity itself without a kernel)."""
    J0 = jacobian0(K, dL, trivial)
    if trivial:
        return J0
    if J0.shape[0] <= SMALL:
        if _gauss_jordan(J0):
            return J0
        return np.full(J0.shape, np.nan)
    return np.ascontiguousarray(np.linalg.inv(J0))


@numba.njit(cache=True, nogil=True)
def apply_j0(K, dL, x, trivial):
    """J0 x."""
    if trivial:
        return x.copy()
    out = np.empty(x.size)
    _mv(K, dL * x, out)
    return x + out


@numba.njit(cache=True, nogil=True)
def _z_of(A, U):
    """Z = A U^T (M x r)."""
    M = A.shape[0]
    r = U.shape[0]
    Z = np.empty((M, r))
    col = np.empty(M)
    for k in range(r):
        _mv(A, U[k], col)
        for i in range(M):
            Z[i, k] = col[i]
    return Z


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
def _cap_of(c, V, dL, Z, CVd):
    """CVd = diag(c) V diag(L') (filled in place) and cap = 1 + CVd Z."""
    r = c.size
    M = dL.size
    for k in range(r):
        for i in range(M):
            CVd[k, i] = c[k] * V[k, i] * dL[i]
    cap = np.eye(r)
    for a in range(r):
        for b in range(r):
            s = 0.0
            for i in range(M):
                s += CVd[a, i] * Z[i, b]
            cap[a, b] += s
    return cap


@numba.njit(cache=True, nogil=True)
def capacitance(U, V, c, dL, A):
    """(CVd, Z = A U^T, cap = 1 + CVd Z) for the Woodbury formula."""
    r = c.size
    CVd = np.empty((r, dL.size))
    Z = _z_of(A, U)
    cap = _cap_of(c, V, dL, Z, CVd)
    return CVd, Z, cap


@numba.njit(cache=True, nogil=True)
def refine_capacitance(K, U, dL, A, CVd, Z, trivial, sweeps):
    """Z -> J0(dL)^{-1} U^T by iterative refinement with an approximate inverse A (a chord
    inverse from a neighbouring point): Z += A (U^T - J0 Z), at most ``sweeps`` times, until
    the correction is at rounding level. Returns (Z, cap, sweeps used)."""
    r = Z.shape[1]
    M = dL.size
    used = 0
    dz = np.empty(M)
    for k in range(r):
        z = np.ascontiguousarray(Z[:, k])
        for it in range(sweeps):
            _mv(A, U[k] - apply_j0(K, dL, z, trivial), dz)
            z = z + dz
            used = max(used, it + 1)
            if np.max(np.abs(dz)) <= 4 * _EPS * np.max(np.abs(z)):
                break
        for i in range(M):
            Z[i, k] = z[i]
    cap = np.eye(r)
    for a in range(r):
        for b in range(r):
            s = 0.0
            for i in range(M):
                s += CVd[a, i] * Z[i, b]
            cap[a, b] += s
    return Z, cap, used


@numba.njit(cache=True, nogil=True)
def woodbury(A, CVd, Z, cap, b):
    """J^{-1} b with J^{-1} = A - Z cap^{-1} CVd A."""
    y = np.empty(b.size)
    _mv(A, b, y)
    r = CVd.shape[0]
    if r:
        w = _small_solve(cap, CVd @ y)
        for k in range(r):
            y -= w[k] * Z[:, k]
    return y


@numba.njit(cache=True, nogil=True)
def woodbury_transposed(A, CVd, Z, cap, b):
    """J^{-T} b with J^{-T} = A^T - A^T CVd^T cap^{-T} Z^T."""
    M = b.size
    x = b.copy()
    r = CVd.shape[0]
    if r:
        zb = np.zeros(r)
        for k in range(r):
            for i in range(M):
                zb[k] += Z[i, k] * b[i]
        w = _small_solve(np.ascontiguousarray(cap.T), zb)
        for k in range(r):
            for i in range(M):
                x[i] -= w[k] * CVd[k, i]
    out = np.empty(M)
    _mtv(A, x, out)
    return out


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
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
    total = 0.0
    for i in range(M):
        sep = 0.0
        for k in range(c.size):
            sep += abs(c[k] * S[k] * U[k, i])
        kl = 0.0
        if not trivial:
            for j in range(M):
                kl += abs(K[i, j] * L[j])
        dF = _EPS * (abs(e[i]) + abs(nu[i]) + kl + sep)
        total += (lam[i] * dF) ** 2
    energy = 0.0
    for i in range(M):
        energy += abs(wE[i] * L[i])
    return ROUNDING_SAFETY * np.sqrt(total) + 4 * _EPS * energy


# -- Newton ------------------------------------------------------------------------------------

@numba.njit(cache=True, nogil=True)
def _small_det(C):
    """det C for the r x r capacitance (Gaussian elimination with partial pivoting)."""
    r = C.shape[0]
    A = C.copy()
    det = 1.0
    for k in range(r):
        p = k
        for i in range(k + 1, r):
            if abs(A[i, k]) > abs(A[p, k]):
                p = i
        if A[p, k] == 0.0:
            return 0.0
        if p != k:
            for j in range(r):
                t = A[k, j]
                A[k, j] = A[p, j]
                A[p, j] = t
            det = -det
        det *= A[k, k]
        for i in range(k + 1, r):
            f = A[i, k] / A[k, k]
            for j in range(k, r):
                A[i, j] -= f * A[k, j]
    return det


#: with a chord inverse, the capacitance is refined to the exact one of this iterate when
#: its determinant (the fold indicator) is below this: next to a fold, where its sign decides
#: the branch and its size the distance
REFINE_FOLD = 0.2


@numba.njit(cache=True, nogil=True)
def _fold_only(K, U, V, c, dL, A, Z, fresh, trivial):
    """The fold indicator of `_fold_and_rounding` without the rounding estimate."""
    r = c.size
    if r == 0:
        return 1.0
    CVd = np.empty((r, dL.size))
    cap = _cap_of(c, V, dL, Z, CVd)
    fold = _small_det(cap)
    if not fresh and abs(fold) < REFINE_FOLD:
        Z, cap, _ = refine_capacitance(K, U, dL, A, CVd, Z.copy(), trivial, 30)
        fold = _small_det(cap)
    return fold


@numba.njit(cache=True, nogil=True)
def _fold_and_rounding(K, nu, U, V, c, wE, e, L, dL, A, Z, fresh, trivial):
    """(fold indicator, rounding estimate) at the final iterate. With a chord inverse (not
    ``fresh``) the capacitance is off by the chord's rate (a few per cent): enough away from
    folds; below REFINE_FOLD it is refined to the exact one."""
    r = c.size
    CVd = np.empty((r, e.size))
    cap = _cap_of(c, V, dL, Z, CVd)
    fold = _small_det(cap) if r else 1.0
    if not fresh and r and abs(fold) < REFINE_FOLD:
        Z, cap, _ = refine_capacitance(K, U, dL, A, CVd, Z.copy(), trivial, 30)
        fold = _small_det(cap)
    S = np.zeros(r)
    for k in range(r):
        for i in range(e.size):
            S[k] += V[k, i] * L[i]
    return fold, rounding_error(K, nu, U, c, wE, e, L, dL, A, CVd, Z, cap, S, trivial)


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
    chord_rate = CHORD_RATE if M <= SMALL else CHORD_RATE_LARGE
    if occupation_terms(e, sign, L, dL) != 0:
        return e, L, dL, 0, np.inf, np.inf, OUTSIDE_DOMAIN, nan, nan, A, inversions
    work = np.empty(M)
    F = np.empty(M)
    F_new = np.empty(M)
    y = np.empty(M)
    delta = np.empty(M)
    e_new = np.empty(M)
    L_new = np.empty(M)
    dL_new = np.empty(M)
    CVd = np.empty((r_, M))
    _residual_into(K, nu, U, V, c, e, L, trivial, work, F)
    r = np.max(np.abs(F))
    floor = 64 * _EPS * max(1.0, np.max(np.abs(nu)))
    fresh = False  # A is the inverse of J0 at the current iterate
    if not have_A:
        A = inverse_j0(K, dL, trivial)
        inversions += 1
        fresh = True
    Z = _z_of(A, U)
    rate = 0.0
    dE = np.inf
    rounding = nan
    fold_at = -1  # the iteration whose fold indicator `fold_at_it` is
    fold_at_it = nan
    at_floor = 0
    for it in range(maxiter + 1):
        cap = _cap_of(c, V, dL, Z, CVd)
        _mv(A, F, y)
        if r_:
            w = _small_solve(cap, CVd @ y)
            for i in range(M):
                s = y[i]
                for k in range(r_):
                    s -= Z[i, k] * w[k]
                delta[i] = -s
        else:
            for i in range(M):
                delta[i] = -y[i]
        E = 0.0
        dEs = 0.0
        dmax = 0.0
        finite = True
        for i in range(M):
            E += wE[i] * L[i]
            dEs += wE[i] * dL[i] * delta[i]
            a = abs(delta[i])
            if not (a < np.inf):
                finite = False
            if a > dmax:
                dmax = a
        if not finite:
            return e, L, dL, it, r, dE, SINGULAR, nan, nan, A, inversions
        dE_last = dE
        dE = abs(dEs) / (1.0 - rate)
        small = dmax < 1e-6 or r <= floor
        done = small and dE <= max(1e-1 * tol, 8 * _EPS) * abs(E)
        if not done and r <= 1e3 * floor:  # residual at rounding level: is dE the floor?
            if not (rounding == rounding):
                fold_at_it, rounding = _fold_and_rounding(K, nu, U, V, c, wE, e, L, dL, A, Z,
                                                          fresh, trivial)
                fold_at = it
            # at the floor the steps are amplified rounding noise: stop once they stop
            # shrinking; the iterate's error is then the rounding the estimate covers, and
            # only the part of the step beyond it counts as iteration error
            done = dE <= 2.0 * rounding and dE > 0.5 * dE_last
            if done:
                dE = max(dE - rounding, 0.0)
            else:
                # next to a fold the steps at the floor can be amplified noise well above the
                # estimate (rounding that is not independent between equations): after
                # FLOOR_STEPS of them stop, the larger of the last two steps' energy changes
                # being the iterate's error (the caller's tolerance decides whether it is met);
                # steps that still shrink (a chord iteration converging) are not counted
                if dE > 0.5 * dE_last:
                    at_floor += 1
                if at_floor >= FLOOR_STEPS:
                    done = True
                    dE = max(dE, dE_last)
        if done:
            if fold_at == it:  # this iterate's fold indicator and rounding are known
                fold = fold_at_it
            elif rounding == rounding:  # the rounding (of an earlier iterate) is what is kept
                fold = _fold_only(K, U, V, c, dL, A, Z, fresh, trivial)
            else:
                fold, rnd = _fold_and_rounding(K, nu, U, V, c, wE, e, L, dL, A, Z, fresh,
                                               trivial)
                if not (rounding == rounding):
                    rounding = rnd
            return e, L, dL, it, r, dE, CONVERGED, fold, rounding, A, inversions
        if it == maxiter:
            break
        lam = 1.0
        accepted = False
        r_new = r
        while True:
            for i in range(M):
                e_new[i] = e[i] + lam * delta[i]
            if occupation_terms(e_new, sign, L_new, dL_new) == 0:
                _residual_into(K, nu, U, V, c, e_new, L_new, trivial, work, F_new)
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
                Z = _z_of(A, U)
                inversions += 1
                fresh, rate = True, 0.0
                continue
            if r <= 1e3 * floor:  # stagnation at rounding level is convergence
                fold, rnd = _fold_and_rounding(K, nu, U, V, c, wE, e, L, dL, A, Z, fresh,
                                               trivial)
                return e, L, dL, it, r, max(dE, rnd), CONVERGED, fold, rnd, A, inversions
            return e, L, dL, it, r, dE, LINE_SEARCH_FAILED, nan, nan, A, inversions
        step_rate = r_new / r if r > 0 else 0.0
        e, e_new = e_new, e
        L, L_new = L_new, L
        dL, dL_new = dL_new, dL
        F, F_new = F_new, F
        r = r_new
        was_fresh = fresh
        fresh = False  # A now belongs to the previous iterate: chord from here on
        if was_fresh:
            rate = 0.0
        elif lam == 1.0:
            rate = max(rate, min(step_rate, 0.9))
        if not was_fresh and lam == 1.0 and step_rate > chord_rate and r > floor:
            A = inverse_j0(K, dL, trivial)
            Z = _z_of(A, U)
            inversions += 1
            fresh, rate = True, 0.0
    return e, L, dL, maxiter, r, dE, MAX_ITERATIONS, nan, nan, A, inversions


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
def summary(K, L, e, wE, wP, V, n, N, trivial):
    """What a solved grid level keeps: (dressing -K L, scalars V L, E, P, tail estimate).

    The tail estimate is sum over species and both ends of |wE L| / r at the cutoff, with r the
    decay rate of the integrand there: int_Lambda^inf cosh t e^{-eps} dt ~ cosh(Lambda) L(Lambda)
    / eps'(Lambda) where eps grows; on the plateau side of a massless species (eps and L
    constant, weight e^{-|t|}) the weight's own rate |d log wE / dt| (per grid step: the larger
    of the two differences; for massive species the eps difference always is)."""
    M = e.size
    dressing = np.zeros(M)
    if not trivial:
        _mv(K, L, dressing)
        dressing = -dressing
    r = V.shape[0]
    S = np.zeros(r)
    for k in range(r):
        for i in range(M):
            S[k] += V[k, i] * L[i]
    E = 0.0
    P = 0.0
    for i in range(M):
        E += wE[i] * L[i]
        P += wP[i] * L[i]
    if N < 2:  # (the pairs below would read past the species' points)
        raise ValueError("a grid of one point per species has no tail estimate")
    tail = 0.0
    for a in range(n):
        for i, j in ((a * N, a * N + 1), (a * N + N - 1, a * N + N - 2)):
            slope = max(abs(e[i] - e[j]), abs(np.log(abs(wE[i]) / abs(wE[j]))), 1e-300)
            tail += abs(wE[i] * L[i]) / slope
    return dressing, S, E, P, tail


@numba.njit(cache=True, nogil=True)
def extrapolate(radii, g, R):
    """Lagrange extrapolation to R of the rows of ``g`` given at ``radii`` (the history of a
    grid level along a scan, newest first): degree k - 1 from k radii. Far outside the spacing
    of the history the order is lowered, and where the weights would amplify the history more
    than 4 2^k (radii clustered far from R, as a root search leaves them: at equal spacing one
    step ahead the sum of |weights| is 2^k - 1)."""
    k = radii.size
    if k == 0:
        return np.zeros(g.shape[1])
    while k >= 2 and abs(R - radii[0]) > 4 * abs(radii[0] - radii[k - 1]):
        k -= 1
    w = np.empty(k)
    while k >= 2:
        total = 0.0
        for a in range(k):
            w[a] = 1.0
            for b in range(k):
                if b != a:
                    w[a] *= (R - radii[b]) / (radii[a] - radii[b])
            total += abs(w[a])
        if total <= 4.0 * 2.0 ** k:
            break
        k -= 1
    if k < 2:
        w[0] = 1.0
        k = 1
    out = np.zeros(g.shape[1])
    for a in range(k):
        out += w[a] * g[a]
    return out


@numba.njit(cache=True, nogil=True)
def interpolate(values, t_first, h, t):
    """Cubic (4-point Lagrange) interpolation of the rows of ``values``, given on the uniform
    grid t_first + j h (j = 0 .. N - 1, N >= 4), at the points ``t``; 0 outside that grid.
    Exact at its points."""
    n, N = values.shape
    out = np.zeros((n, t.size))
    for q in range(t.size):
        x = (t[q] - t_first) / h
        if x < -1e-9 or x > N - 1 + 1e-9:
            continue
        i = min(max(int(np.floor(x)) - 1, 0), N - 4)
        u = x - i
        w0 = -(u - 1) * (u - 2) * (u - 3) / 6
        w1 = u * (u - 2) * (u - 3) / 2
        w2 = -u * (u - 1) * (u - 3) / 2
        w3 = u * (u - 1) * (u - 2) / 6
        for a in range(n):
            out[a, q] = (w0 * values[a, i] + w1 * values[a, i + 1] + w2 * values[a, i + 2]
                         + w3 * values[a, i + 3])
    return out


# -- solves with an approximate inverse ---------------------------------------------------------

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
    x = np.empty(b.size)
    _mv(A, b, x)
    dx = np.empty(b.size)
    change = np.inf
    for it in range(maxiter):
        _mv(A, b - apply_j0(K, dL, x, trivial), dx)
        x = x + dx
        new = np.max(np.abs(dx))
        if new <= 4 * _EPS * np.max(np.abs(x)) or new >= change:
            return x, new <= 1e-10 * max(np.max(np.abs(x)), 1e-300), it + 1
        change = new
    return x, change <= 1e-10 * max(np.max(np.abs(x)), 1e-300), maxiter


@numba.njit(cache=True, nogil=True)
def solve_level(K, drive, U, V, c, wE, wP, R, hist_radii, hist_g, use_history, e_start, sign,
                tol, maxiter, A0, have_A, trivial, n, N, out, small):
    """One grid level of a point in one call: the start (the level's own history extrapolated
    in R, or ``e_start``), `newton`, `summary`, and the level's new history (this point in
    front of up to HISTORY - 1 older radii).

    The arrays go into buffers of the caller (boxing new arrays costs more than the whole
    iteration on a small grid): ``out`` of shape (4 + HISTORY, M) gets e, L, dL, the dressing
    and the history's g (rows 4 to 4 + k - 1), ``small`` of size r + HISTORY the scalars
    S = V L and the history's radii (from r on). Returns (iterations, residual,
    iteration_error, status, fold, rounding, A, E, P, tail, k); A is ``A0`` itself unless J0
    was inverted here."""
    M = drive.size
    r = c.size
    nu = R * drive
    if use_history:
        e0 = nu + extrapolate(hist_radii, hist_g, R)
    else:
        e0 = e_start
    e, L, dL, its, res, dE, status, fold, rounding, A, _ = newton(
        K, nu, U, V, c, wE, e0, sign, tol, maxiter, A0, have_A, trivial)
    dressing, S, E, P, tail = summary(K, L, e, wE, wP, V, n, N, trivial)
    for i in range(M):
        out[0, i] = e[i]
        out[1, i] = L[i]
        out[2, i] = dL[i]
        out[3, i] = dressing[i]
        out[4, i] = e[i] - nu[i]
    for k in range(r):
        small[k] = S[k]
    small[r] = R
    k = 1
    if use_history:
        for a in range(hist_radii.size):
            if hist_radii[a] != R and k < HISTORY:
                small[r + k] = hist_radii[a]
                for i in range(M):
                    out[4 + k, i] = hist_g[a, i]
                k += 1
    return its, res, dE, status, fold, rounding, A, E, P, tail, k


#: columns of the per-level record of `solve_run`: iterations, residual, iteration error,
#: fold indicator, rounding estimate, E, P, tail estimate, history length, J0 inverted here,
#: the level's octave key within 1e-9 of an integer (the caller checks it again)
RUN_FIELDS = 11


@numba.njit(cache=True, nogil=True)
def _run_level(K, drive, U, V, c, wE, wP, R, hist_r, hist_g, sign, tol, maxiter, A, trivial,
               n, N, out, small, rec):
    """`solve_level` from the level's history with chord steps on ``A``, its outcome written
    into ``rec`` (`RUN_FIELDS`); returns (status, the inverse of J0 used last)."""
    its, res, dE, status, fold, rounding, A_new, E, P, tail, k = solve_level(
        K, drive, U, V, c, wE, wP, R, hist_r, hist_g, True, drive, sign, tol, maxiter, A,
        True, trivial, n, N, out, small)
    rec[0], rec[1], rec[2], rec[3], rec[4] = its, res, dE, fold, rounding
    rec[5], rec[6], rec[7], rec[8] = E, P, tail, k
    rec[9] = 1.0 if A_new.ctypes.data != A.ctypes.data else 0.0
    return status, A_new


@numba.njit(cache=True, nogil=True)
def _octave_key(r_eff, keys):
    """(floor(64 log2 r_eff) lies in [keys[0], keys[1]], it lies within 1e-9 of an integer)."""
    x = 64.0 * np.log2(r_eff)
    key = np.floor(x)
    return keys[0] <= key <= keys[1], min(x - key, key + 1.0 - x) < 1e-9


@numba.njit(cache=True, nogil=True)
def _plain(status, rec, deformed, tol, amplified, polish_fraction, tail_fraction):
    """A level solved by `_run_level` needs nothing more of the caller's point loop: converged,
    a positive fold indicator (``deformed``), no extended-precision polish, no wider cutoff."""
    if status != CONVERGED:
        return False
    size = abs(rec[5])
    if deformed and not rec[3] > 0:
        return False
    if rec[4] > amplified * size and rec[4] + rec[2] > polish_fraction * tol * size:
        return False
    return not rec[7] > tail_fraction * tol * size


@numba.njit(cache=True, nogil=True)
def solve_run(K0, drive0, U0, V0, wE0, wP0, hr0, hg0, A0, out0, small0, rec0, keys0,
              K1, drive1, U1, V1, wE1, wP1, hr1, hg1, A1, out1, small1, rec1, keys1,
              c, n, N0, N1, radii, E_prev, ttbar, deformed, sign, tol, maxiter, trivial,
              amplified, polish_fraction, tail_fraction):
    """Consecutive points of a scan whose two grid levels keep their grids, in one call: at
    each radius, level 0 and then level 1 exactly as `solve_level` solves them along a scan
    (from each level's own history, chord steps on its inverse of J0), while every decision
    the caller's general path takes between the levels comes out the plain way: each level's
    effective radius R + ttbar E (E: the previous point's fine energy for level 0, this point's
    level-0 energy for level 1; ``ttbar`` NaN: R itself) has its octave key
    floor(64 log2 R_eff) in [keys[0], keys[1]] (the keys whose grid is this one), Newton
    converged, the fold indicator is positive (``deformed``), no extended-precision polish or
    wider cutoff is called for (``amplified``, ``polish_fraction``, ``tail_fraction`` as in the
    caller) and the two levels agree within tol. Point j's arrays go into out*[j], small*[j]
    and rec*[j] (`RUN_FIELDS`), its history being point j - 1's (the caller's for j = 0).
    A key within 1e-9 of an integer is flagged in rec*[j, 10] (the caller's log2 may round
    the other way there). Returns (points done, the inverses of J0 of the last point's two
    levels): the run stops after a point where J0 was inverted (its new inverse is returned),
    and before a point where any decision goes the other way (the caller solves that one in
    full)."""
    r = c.size
    P = radii.size
    A_0, A_1 = A0, A1
    for j in range(P):
        R = radii[j]
        if j == 0:
            h_r0, h_g0, h_r1, h_g1 = hr0, hg0, hr1, hg1
        else:
            k0 = int(rec0[j - 1, 8])
            k1 = int(rec1[j - 1, 8])
            h_r0, h_g0 = small0[j - 1, r:r + k0], out0[j - 1, 4:4 + k0]
            h_r1, h_g1 = small1[j - 1, r:r + k1], out1[j - 1, 4:4 + k1]
        r_eff = R + ttbar * E_prev if ttbar == ttbar else R
        if not r_eff > 0:
            r_eff = R
        inside, edge0 = _octave_key(r_eff, keys0)
        if not inside:
            return j, A_0, A_1
        status, A_new0 = _run_level(K0, drive0, U0, V0, c, wE0, wP0, R, h_r0, h_g0, sign, tol,
                                    maxiter, A_0, trivial, n, N0, out0[j], small0[j], rec0[j])
        if not _plain(status, rec0[j], deformed, tol, amplified, polish_fraction, tail_fraction):
            return j, A_0, A_1
        E0 = rec0[j, 5]
        if ttbar == ttbar:
            r_eff1 = R + ttbar * E0
            if r_eff1 != 0.0:
                r_eff = r_eff1
        if not r_eff > 0:
            return j, A_0, A_1
        inside, edge1 = _octave_key(r_eff, keys1)
        if not inside:
            return j, A_0, A_1
        status, A_new1 = _run_level(K1, drive1, U1, V1, c, wE1, wP1, R, h_r1, h_g1, sign, tol,
                                    maxiter, A_1, trivial, n, N1, out1[j], small1[j], rec1[j])
        if not _plain(status, rec1[j], deformed, tol, amplified, polish_fraction, tail_fraction):
            return j, A_0, A_1
        E1 = rec1[j, 5]
        size = abs(E1)
        rec0[j, 10] = 1.0 if edge0 else 0.0
        rec1[j, 10] = 1.0 if edge1 else 0.0
        error = abs(E1 - E0) + rec1[j, 2] + rec0[j, 2] + rec1[j, 4] + rec1[j, 7]
        if not error <= tol * size:
            return j, A_0, A_1
        E_prev = E1
        A_0, A_1 = A_new0, A_new1
        if rec0[j, 9] or rec1[j, 9]:
            return j + 1, A_0, A_1
    return P, A_0, A_1
