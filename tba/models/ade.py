"""Minimal purely elastic ADE scattering theories as products of TBA blocks.

For a Dynkin diagram with incidence matrix ``I`` (or ``[[1]]`` for the
tadpole) and Coxeter number ``h`` the Fourier-transformed TBA kernels obey

    (delta_ab - phit_ab(k) / 2 pi)^(-1) = delta_ab - I_ab / (2 cosh(pi k / h))

(T.R. Klassen and E. Melzer, Nucl. Phys. B338 (1990) 485).  Each S_ab is a
product of blocks

    f_x(t) = (sinh t + i sin(pi x)) / (sinh t - i sin(pi x)),  f_x == f_(1-x),

with x = j/h, whose kernels phi_x = -i d/dt log f_x have the transform

    int e^{ikt} phi_x(t) dt = -2 pi cosh(pi k (1/2 - x)) / cosh(pi k / 2).

`ade_scattering` recovers the block multiplicities by solving the identity
at sample momenta with mpmath, rounds them to integers and verifies the
result at independent momenta.  The masses are the Perron-Frobenius vector
of ``I``.  Theories whose S-matrices are not products of f_x blocks (e.g.
A_n with n >= 2, whose particles are not self-conjugate) are rejected.
"""
import functools
import operator
from fractions import Fraction

import mpmath
import numpy as np

from tba.models.blocks import block_transform

__all__ = ["E8_INCIDENCE", "E8_COXETER", "TADPOLE_INCIDENCE",
           "TADPOLE_COXETER", "ade_scattering", "block_transform"]


def _e8_incidence():
    # Chain 0-1-...-6, node 7 attached to node 2 (third node from one end).
    inc = np.zeros((8, 8), dtype=int)
    for a, b in [(i, i + 1) for i in range(6)] + [(2, 7)]:
        inc[a, b] = inc[b, a] = 1
    return inc


E8_INCIDENCE = _e8_incidence()
E8_COXETER = 30
TADPOLE_INCIDENCE = np.array([[1]])
TADPOLE_COXETER = 3

_INTEGER_TOL = 1e-15


def _mp_block(x, k):
    return -2 * mpmath.pi * mpmath.cosh(mpmath.pi * k * (mpmath.mpf(1) / 2 - x)) \
        / mpmath.cosh(mpmath.pi * k / 2)


def _mp_phit(inc, h, k):
    """2 pi (1 - (1 - I / (2 cosh(pi k / h)))^(-1)) as an mpmath matrix."""
    n = len(inc)
    one = mpmath.eye(n)
    m = one - mpmath.matrix(inc.tolist()) / (2 * mpmath.cosh(mpmath.pi * k / h))
    return 2 * mpmath.pi * (one - m ** -1)


def _validate(incidence, coxeter):
    try:
        inc = np.asarray(incidence)
        ok = inc.ndim == 2 and inc.shape[0] == inc.shape[1] > 0 \
            and np.issubdtype(inc.dtype, np.number) \
            and np.all(np.isfinite(inc)) and np.all(inc == np.round(inc.real))
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise ValueError("incidence must be a non-empty square matrix of integers")
    inc = inc.real.astype(int)
    if np.any(inc < 0):
        raise ValueError("incidence must have non-negative entries")
    if not np.array_equal(inc, inc.T):
        raise ValueError("incidence must be symmetric")
    reach = np.eye(len(inc), dtype=bool)
    for _ in range(len(inc)):
        reach = reach | (reach.astype(int) @ inc > 0)
    if not reach.all():
        raise ValueError("incidence must describe a connected diagram")
    if isinstance(coxeter, bool):
        raise ValueError("coxeter must be an integer >= 2")
    try:
        h = operator.index(coxeter)
    except TypeError:
        raise ValueError("coxeter must be an integer >= 2") from None
    if h < 2:
        raise ValueError("coxeter must be an integer >= 2")
    return inc, h


@functools.lru_cache(maxsize=None)
def _solve(inc_key, h):
    inc = np.array(inc_key, dtype=int)
    n = len(inc)
    evals, evecs = np.linalg.eigh(inc.astype(float))
    if evals[-1] >= 2 - 1e-12:
        raise ValueError("incidence has spectral radius >= 2: not a finite "
                         "Dynkin (or tadpole) diagram")
    pf = np.abs(evecs[:, -1])
    order = np.argsort(np.round(pf / pf.min(), 12), kind="stable")
    masses = pf[order] / pf[order[0]]
    inc = inc[np.ix_(order, order)]

    xs = [Fraction(j, h) for j in range(1, h // 2 + 1)]
    nx = len(xs)
    with mpmath.workdps(50 + h):
        fit_k = [mpmath.mpf(h) * i / nx for i in range(nx)]
        check_k = [mpmath.mpf(h) * (i + mpmath.mpf(1) / 3) / nx
                   for i in range(nx)] + [mpmath.mpf(2) * h]
        basis = lambda k: [_mp_block(mpmath.mpf(x.numerator) / x.denominator, k)
                           for x in xs]
        a_inv = mpmath.matrix([basis(k) for k in fit_k]) ** -1
        targets = [_mp_phit(inc, h, k) for k in fit_k]
        checks = [(basis(k), _mp_phit(inc, h, k)) for k in check_k]
        blocks = [[None] * n for _ in range(n)]
        for a in range(n):
            for b in range(a, n):
                coef = a_inv * mpmath.matrix([t[a, b] for t in targets])
                mult = [int(mpmath.nint(c)) for c in coef]
                err = max(abs(c - m) for c, m in zip(coef, mult))
                if err > _INTEGER_TOL:
                    raise ValueError(
                        f"S_{a + 1}{b + 1} is not a product of f_(j/{h}) blocks "
                        f"(non-integrality {mpmath.nstr(err, 3)})")
                if min(mult) < 0:
                    raise ValueError(f"S_{a + 1}{b + 1} needs negative block "
                                     f"multiplicities {mult}")
                for bas, phit in checks:
                    res = abs(mpmath.fsum(m * v for m, v in zip(mult, bas)) - phit[a, b])
                    if res > mpmath.mpf(10) ** (-40):
                        raise ValueError(
                            f"blocks of S_{a + 1}{b + 1} fail the identity "
                            f"(residual {mpmath.nstr(res, 3)})")
                blocks[a][b] = blocks[b][a] = tuple(
                    (x, m) for x, m in zip(xs, mult) if m)
    return tuple(masses), tuple(tuple(row) for row in blocks)


def ade_scattering(incidence, coxeter):
    """Masses and S-matrix blocks of a minimal purely elastic ADE theory.

    Parameters
    ----------
    incidence : array_like of int
        Symmetric, non-negative, integer incidence matrix of a connected
        Dynkin diagram (``[[1]]`` for the tadpole).
    coxeter : int
        Coxeter number ``h >= 2``.

    Returns
    -------
    masses : numpy.ndarray
        Perron-Frobenius vector of `incidence`, sorted ascending and
        normalised to ``masses[0] == 1.0``; particles are labelled in this
        order.
    blocks : tuple of tuple of dict
        ``blocks[a][b]`` maps ``Fraction x`` (0 < x <= 1/2) to the positive
        multiplicity of f_x in S_ab; symmetric in ``a, b``.

    Raises
    ------
    ValueError
        On malformed input, or if the S-matrices are not products of
        f_(j/h) blocks with non-negative integer multiplicities.
    """
    inc, h = _validate(incidence, coxeter)
    masses, blocks = _solve(tuple(map(tuple, inc.tolist())), h)
    return (np.array(masses),
            tuple(tuple(dict(cell) for cell in row) for row in blocks))
