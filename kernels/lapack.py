"""LU factorisation with partial pivoting inside compiled code: LAPACK's dgetrf, reached through
the LAPACK binding numba itself uses for numpy.linalg (so that functions calling it can be
cached), and the triangular solves that go with it.

`lu_factor` works on the transpose stored in C order, which is the matrix in LAPACK's column
order: ``at[j, i]`` holds J[i, j] before and the factor (L below, U on and above the diagonal
of J) after. Pivots are 1-based, as LAPACK returns them. The pivots are those of scipy's
``lu_factor`` (the same routine from the same library). Where numba's binding is missing (a
future numba), a loop written here takes its place: the same algorithm, unblocked.
"""

import numba
import numpy as np

try:
    from numba.extending import overload
    from numba.np.linalg import (_LAPACK, _dummy_liveness_func, ensure_lapack, get_blas_kind,
                                 F_INT_nptype)
    HAVE_LAPACK = True
except ImportError:  # pragma: no cover - numba internals moved
    HAVE_LAPACK = False
    F_INT_nptype = np.int32

#: integer type of the pivot array
PIVOT_TYPE = F_INT_nptype


@numba.njit(cache=True, nogil=True)
def lu_loops(at, ipiv):
    """The factorisation of `lu_factor` in plain loops (right-looking, partial pivoting on
    the column's largest entry, the first of equal ones). Returns LAPACK's info."""
    n = at.shape[0]
    info = 0
    for k in range(n):
        p = k
        big = abs(at[k, k])
        for i in range(k + 1, n):
            v = abs(at[k, i])
            if v > big:
                big, p = v, i
        ipiv[k] = p + 1
        if p != k:
            for j in range(n):
                tmp = at[j, k]
                at[j, k] = at[j, p]
                at[j, p] = tmp
        d = at[k, k]
        if d == 0.0:
            if info == 0:
                info = k + 1
            continue
        for i in range(k + 1, n):
            at[k, i] /= d
        for j in range(k + 1, n):
            f = at[j, k]
            if f != 0.0:
                for i in range(k + 1, n):
                    at[j, i] -= at[k, i] * f
    return info


if HAVE_LAPACK:
    def _getrf(at, ipiv):  # replaced in compiled code by the overload below
        raise NotImplementedError

    @overload(_getrf)
    def _getrf_overload(at, ipiv):
        ensure_lapack()
        xxgetrf = _LAPACK().numba_xxgetrf(at.dtype)
        kind = ord(get_blas_kind(at.dtype, "getrf"))

        def impl(at, ipiv):
            n = at.shape[0]
            info = xxgetrf(kind, n, n, at.ctypes, n, ipiv.ctypes)
            _dummy_liveness_func([at.size, ipiv.size])
            return info

        return impl

    @numba.njit(cache=True, nogil=True)
    def lu_factor(at, ipiv):
        """Factor the matrix whose transpose is ``at`` (C order, square) in place; ``ipiv`` of
        `PIVOT_TYPE` receives the pivots. Returns LAPACK's info (> 0: an exact zero pivot)."""
        return _getrf(at, ipiv)
else:  # pragma: no cover
    lu_factor = lu_loops


@numba.njit(cache=True, nogil=True, error_model="numpy")
def lu_solve(at, ipiv, b):
    """x with J x = b from the factor of `lu_factor` (b is overwritten and returned)."""
    n = at.shape[0]
    for k in range(n):
        p = ipiv[k] - 1
        if p != k:
            tmp = b[k]
            b[k] = b[p]
            b[p] = tmp
    for j in range(n):  # L y = P b, unit diagonal, by columns of L (rows of at)
        bj = b[j]
        if bj != 0.0:
            for i in range(j + 1, n):
                b[i] -= at[j, i] * bj
    for j in range(n - 1, -1, -1):  # U x = y, by columns of U
        b[j] /= at[j, j]
        bj = b[j]
        if bj != 0.0:
            for i in range(j):
                b[i] -= at[j, i] * bj
    return b


@numba.njit(cache=True, nogil=True, error_model="numpy")
def pivot_summary(at, ipiv):
    """(sign of det J, smallest over largest |pivot|) of a factor from `lu_factor`."""
    n = at.shape[0]
    sign = 1.0
    small, big = np.inf, 0.0
    for k in range(n):
        d = at[k, k]
        if d < 0:
            sign = -sign
        elif d == 0:
            sign = 0.0
        a = abs(d)
        small = min(small, a)
        big = max(big, a)
        if ipiv[k] != k + 1:
            sign = -sign
    return sign, (small / big if big > 0 else np.nan)
