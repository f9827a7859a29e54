"""Minimal purely elastic ADE scattering theories, and the tadpoles, as products of TBA blocks.

For a Dynkin diagram with incidence matrix ``I`` (the tadpole T_n: a chain of n nodes with a loop
at one end) and Coxeter number ``h`` the Fourier-transformed TBA kernels obey

    (delta_ab - phit_ab(k) / 2 pi)^(-1) = delta_ab - I_ab / (2 cosh(pi k / h))

(T.R. Klassen and E. Melzer, Nucl. Phys. B338 (1990) 485), that is
-phit(k) / 2 pi = I (2 cosh(pi k / h) - I)^(-1). Everything below is generated from I alone.

Block content. In half-blocks <j/h>, j = 1..h-1 (`tba.models.blocks`), whose kernels have the
transforms -2 pi sinh(pi k (1 - j/h)) / sinh(pi k), the identity reads, with q = e^{pi k/h},

    sum_j n_ab(j) (q^(h-j) - q^(j-h)) = [I (q + 1/q - I)^(-1)]_ab (q^h - q^(-h)) =: P_ab(q).

When the S-matrices are block products, P is a Laurent polynomial with powers between -(h-1)
and h-1 and the multiplicities n_ab(j) are its coefficients: they are read off by a discrete
Fourier transform on the 2h points q = exp(i pi (m + 1/2) / h) (where q + 1/q is never an
eigenvalue of I), rounded to integers, and the identity is then verified with the integer content
in 60-digit arithmetic (mpmath) at momenta not used before. Pairs <x><1-x> are written as
f_x = -<x><1-x>; self-conjugate theories (D_even, E7, E8, T_n) come out as f-blocks only.

Masses: the Perron-Frobenius eigenvector of I (eigenvalue 2 cos(pi/h)).

Antiparticles: the diagram automorphism -w_0, with w_0 the longest element of the Weyl group
(computed by reflecting the Weyl vector rho to -rho): a -> n+1-a on A_n, the two spinor nodes of
D_n for odd n, the flip of E6; every particle is self-conjugate otherwise (tadpoles included).

S_ab(0): -1 for a = b and +1 for a != b. In the block form of Braden, Corrigan, Dorey and Sasaki
(Nucl. Phys. B338 (1990) 689), S_ab = prod {x} with {x} = (x-1)(x+1), (y) = <y/h>, (0) = 1 and
(h) = -1, every {x} is +1 at t = 0 except {1} = (2), which is -1, and {1} occurs in S_aa only
(from memory). This is checked against the S-matrix identity
S_ab(t + i pi/h) S_ab(t - i pi/h) = prod_c S_cb(t)^{I_ac} and crossing (both exact, signs included)
and the bootstrap of the published A_2 and E8 S-matrices in tests/test_ade_family.py.

Species order: ascending mass; a particle is followed by its antiparticle; nodes in the order of
the diagram (Bourbaki numbering) break remaining ties.
"""
import functools
import math
import operator
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from tba.models.blocks import block_transform, key_order, pair_half_blocks
from tba.models.charges import SpectralCharges

__all__ = ["E8_INCIDENCE", "E8_COXETER", "TADPOLE_INCIDENCE", "TADPOLE_COXETER", "AdeTheory",
           "a_incidence", "ade_scattering", "ade_theory", "block_transform", "coxeter_number",
           "d_incidence", "e_incidence", "tadpole_incidence"]


def _incidence(n, links, loops=()):
    inc = np.zeros((n, n), dtype=int)
    for a, b in links:
        inc[a, b] = inc[b, a] = 1
    for a in loops:
        inc[a, a] = 1
    return inc


def a_incidence(n):
    """A_n: a chain of n nodes."""
    return _incidence(n, [(i, i + 1) for i in range(n - 1)])


def d_incidence(n):
    """D_n (n >= 4): a chain of n - 2 nodes and two spinor nodes attached to its last one."""
    return _incidence(n, [(i, i + 1) for i in range(n - 3)] + [(n - 3, n - 2), (n - 3, n - 1)])


def e_incidence(r):
    """E_r (r = 6, 7, 8): a chain of r - 1 nodes and one node attached to the third of them."""
    return _incidence(r, [(i, i + 1) for i in range(r - 2)] + [(2, r - 1)])


def tadpole_incidence(n):
    """T_n: a chain of n nodes with a loop at the last one (A_2n folded by its symmetry)."""
    return _incidence(n, [(i, i + 1) for i in range(n - 1)], loops=[n - 1])


E8_INCIDENCE = e_incidence(8)
E8_COXETER = 30
TADPOLE_INCIDENCE = tadpole_incidence(1)
TADPOLE_COXETER = 3

#: largest deviation from an integer accepted for a multiplicity before the exact check
_ROUNDING_TOL = 1e-6
_CHECK_DIGITS = 60


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
    if np.linalg.eigvalsh(inc.astype(float))[-1] >= 2 - 1e-12:
        raise ValueError("incidence has spectral radius >= 2: not a finite "
                         "Dynkin (or tadpole) diagram")
    if coxeter is None:
        return inc, coxeter_number(inc)
    if isinstance(coxeter, bool):
        raise ValueError("coxeter must be an integer >= 2")
    try:
        h = operator.index(coxeter)
    except TypeError:
        raise ValueError("coxeter must be an integer >= 2") from None
    if h < 2:
        raise ValueError("coxeter must be an integer >= 2")
    return inc, h


def coxeter_number(incidence):
    """h from the largest eigenvalue 2 cos(pi / h) of the incidence matrix."""
    top = np.linalg.eigvalsh(np.asarray(incidence, dtype=float))[-1]
    h = round(math.pi / math.acos(top / 2))
    if abs(2 * math.cos(math.pi / h) - top) > 1e-9:
        raise ValueError(f"incidence: largest eigenvalue {top:.12g} is not 2 cos(pi / h) for an integer h")
    return h


def _antiparticles(inc):
    """-w_0 as a permutation of the nodes (the identity for tadpoles, whose folding makes every
    particle self-conjugate)."""
    n = len(inc)
    if np.any(np.diag(inc)):
        return list(range(n))
    cartan = 2 * np.eye(n, dtype=int) - inc
    lam = np.linalg.solve(cartan.astype(float), np.ones(n))  # rho in the basis of simple roots
    w = np.eye(n)
    while True:
        pairing = lam @ cartan  # <lam, alpha_i^vee>
        positive = np.flatnonzero(pairing > 1e-9)
        if positive.size == 0:
            break
        s = np.eye(n)
        s[positive[0], :] -= cartan[:, positive[0]]
        lam, w = s @ lam, s @ w
    perm = []
    for i in range(n):
        image = -w[:, i]
        j = int(np.argmax(np.abs(image)))
        if not np.allclose(image, np.eye(n)[j]):
            raise ValueError("incidence: -w_0 is not a diagram automorphism (not a Dynkin diagram)")
        perm.append(j)
    return perm


def _half_multiplicities(inc, h):
    """n_ab(j), j = 1..h-1, from the discrete Fourier transform of P_ab(q); shape (n, n, h-1)."""
    n = len(inc)
    q = np.exp(1j * np.pi * (np.arange(2 * h) + 0.5) / h)
    P = np.stack([inc @ np.linalg.inv((z + 1 / z) * np.eye(n) - inc) * (z ** h - z ** -h) for z in q])
    powers = np.arange(1, h)  # q^p carries n(h - p)
    coef = np.einsum("mp,mab->abp", q[:, None] ** (-powers[None, :]), P) / (2 * h)
    if np.max(np.abs(coef.imag)) > _ROUNDING_TOL:
        raise ValueError(f"the kernels are not a product of blocks of 1/{h} (complex coefficients)")
    mult = coef.real[:, :, ::-1]  # index j - 1
    rounded = np.rint(mult)
    worst = float(np.max(np.abs(mult - rounded)))
    if worst > _ROUNDING_TOL:
        raise ValueError(f"the kernels are not a product of blocks of 1/{h} "
                         f"(non-integrality {worst:.3g})")
    return rounded.astype(int)


def _verify_identity(inc, h, mult):
    """The integer content against the identity at two momenta, in 60-digit arithmetic."""
    import mpmath  # here only: solving an ADE model does not need it

    n = len(inc)
    with mpmath.workdps(_CHECK_DIGITS):
        for k in (mpmath.mpf(h) / 7, mpmath.mpf(3) * h / 11):
            c = 2 * mpmath.cosh(mpmath.pi * k / h)
            target = mpmath.matrix(inc.tolist()) * (c * mpmath.eye(n) - mpmath.matrix(inc.tolist())) ** -1
            basis = [mpmath.sinh(mpmath.pi * k * (1 - mpmath.mpf(j) / h)) / mpmath.sinh(mpmath.pi * k)
                     for j in range(1, h)]
            for a in range(n):
                for b in range(n):
                    res = abs(mpmath.fsum(m * v for m, v in zip(mult[a, b], basis)) - target[a, b])
                    if res > mpmath.mpf(10) ** (20 - _CHECK_DIGITS):
                        raise ValueError(f"the kernels are not a product of blocks of 1/{h}: "
                                         f"S_{a + 1}{b + 1} fails the identity (residual "
                                         f"{mpmath.nstr(res, 3)})")


@dataclass(frozen=True)
class AdeTheory:
    """What the identity gives for one diagram, species in the order described above."""

    masses: tuple
    blocks: tuple          # blocks[a][b]: ((key, multiplicity), ...)
    sign: tuple            # S_ab(0)
    antiparticle: tuple
    incidence: tuple       # I in species order
    coxeter: int

    @property
    def charge_rule(self):
        return SpectralCharges(np.array(self.incidence), self.coxeter)


@functools.lru_cache(maxsize=None)
def _theory(inc_key, h):
    inc = np.array(inc_key, dtype=int)
    n = len(inc)
    evals, evecs = np.linalg.eigh(inc.astype(float))
    pf = np.abs(evecs[:, -1])
    conj = _antiparticles(inc)
    mass = np.round(pf / pf.min(), 10)
    order = sorted(range(n), key=lambda a: (mass[a], min(a, conj[a]), a))
    inc = inc[np.ix_(order, order)]
    masses = pf[order] / pf[order[0]]
    position = {node: i for i, node in enumerate(order)}
    conj = tuple(position[conj[node]] for node in order)
    for a in range(1, n):  # degenerate masses (pairs, D_even spinors, D_4) exactly equal
        if mass[order[a]] == mass[order[a - 1]]:
            masses[a] = masses[a - 1]

    mult = _half_multiplicities(inc, h)
    if mult.min() < 0:
        a, b = np.argwhere(mult.min(axis=2) < 0)[0]
        raise ValueError(f"S_{a + 1}{b + 1} needs negative block multiplicities "
                         f"{mult[a, b].tolist()}")
    _verify_identity(inc, h, mult)
    blocks = tuple(tuple(
        tuple(sorted(pair_half_blocks({Fraction(j, h): int(m)
                                       for j, m in enumerate(mult[a, b], start=1) if m}).items(),
                     key=lambda kv: key_order(kv[0])))
        for b in range(n)) for a in range(n))
    sign = tuple(tuple(-1 if a == b else 1 for b in range(n)) for a in range(n))
    return AdeTheory(tuple(masses), blocks, sign, conj, tuple(map(tuple, inc.tolist())), h)


def ade_theory(incidence, coxeter=None):
    """Masses, blocks, S_ab(0), antiparticles and charges of a minimal purely elastic theory.

    Parameters
    ----------
    incidence : array_like of int
        Symmetric, non-negative, integer incidence matrix of a connected Dynkin diagram, or of a
        tadpole (`tadpole_incidence`).
    coxeter : int, optional
        Coxeter number h; computed from the largest eigenvalue 2 cos(pi / h) when omitted.

    Raises
    ------
    ValueError
        On malformed input, or if the S-matrices are not products of blocks of 1/h with
        non-negative integer multiplicities.
    """
    inc, h = _validate(incidence, coxeter)
    return _theory(tuple(map(tuple, inc.tolist())), h)


def ade_scattering(incidence, coxeter):
    """Masses and S-matrix blocks of a minimal purely elastic ADE theory.

    Returns
    -------
    masses : numpy.ndarray
        Perron-Frobenius vector of `incidence`, sorted ascending and normalised to
        ``masses[0] == 1.0``; particles are labelled in this order.
    blocks : tuple of tuple of dict
        ``blocks[a][b]`` maps ``Fraction x`` (0 < x <= 1/2, the block f_x) or ``HalfBlock`` to
        its positive multiplicity in S_ab; symmetric in ``a, b``.
    """
    theory = ade_theory(incidence, coxeter)
    return (np.array(theory.masses),
            tuple(tuple(dict(cell) for cell in row) for row in theory.blocks))
