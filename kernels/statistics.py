"""The function L(eps) of the TBA and its derivative, for both statistics.

fermions:  L = log(1 + exp(-eps)),   dL/deps = -1 / (1 + exp(eps))
bosons:    L = -log(1 - exp(-eps)),  dL/deps = -1 / (exp(eps) - 1)   (eps > 0)

Both are evaluated without overflow for any real eps (fermions) or eps > 0 (bosons).
"""

import math

import numba
import numpy as np


@numba.njit(cache=True, nogil=True)
def _fermion(e):
    if e > 37.5:  # x < 2^-54: log1p(x) and x / (1 + x) round to x itself, without the log
        x = math.exp(-e)
        return x, -x
    if e > 0.0:
        x = math.exp(-e)
        return math.log1p(x), -x / (1.0 + x)
    x = math.exp(e)
    return -e + math.log1p(x), -1.0 / (1.0 + x)


@numba.njit(cache=True, nogil=True)
def _boson(e):
    if e <= 0.0:
        return math.nan, math.nan
    if e > 0.6931471805599453:  # e^{-e} < 1/2: log1p keeps every digit of the small L
        x = math.exp(-e)
        return -math.log1p(-x), -x / (1.0 - x)
    # 1 - e^{-e} = -expm1(-e) keeps every digit for small e
    return -math.log(-math.expm1(-e)), -1.0 / math.expm1(e)


@numba.njit(cache=True, nogil=True)
def occupation_terms(eps, sign, L, dL):
    """Fill ``L`` and ``dL`` (same shape as ``eps``, flattened in C order).

    ``sign`` is +1 for fermions and -1 for bosons. Returns the number of
    points where the bosonic L is undefined (eps <= 0), 0 for fermions.
    """
    if L.size != eps.size or dL.size != eps.size:
        raise ValueError("L and dL must have the size of eps")
    e_flat = eps.ravel()
    L_flat = L.ravel()
    d_flat = dL.ravel()
    bad = 0
    for i in range(e_flat.size):
        if sign > 0:
            a, b = _fermion(e_flat[i])
        else:
            a, b = _boson(e_flat[i])
            if not (a == a):
                bad += 1
        L_flat[i] = a
        d_flat[i] = b
    return bad
