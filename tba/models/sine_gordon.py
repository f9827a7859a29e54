"""Sine-Gordon at its reflectionless points: solitons, antisolitons and breathers, diagonal.

Parameter: N = 1, 2, 3, ..., the point xi = 1/N with xi = beta^2 / (8 pi - beta^2), i.e.
beta^2 = 8 pi / (N + 1); N = 1 is the free-fermion point beta^2 = 4 pi. There are N - 1 breathers.

Amplitudes (A.B. Zamolodchikov and Al.B. Zamolodchikov, Ann. Phys. 120 (1979) 253): with the
soliton-soliton amplitude

    S_0(t) = -exp(-i int_0^inf (dk/k) sin(k t) sinh(pi k (1 - xi)/2) / (sinh(pi k xi/2) cosh(pi k/2))),

soliton-antisoliton transmission S_T(t) = sinh(t/xi) / sinh((i pi - t)/xi) S_0(t) and reflection
S_R(t) = sinh(i pi/xi) / sinh((i pi - t)/xi) S_0(t). At xi = 1/N, sinh(i pi N) = 0: no
reflection, and S_T = sinh(N t) / sinh(N (i pi - t)) S_0 = (-1)^(N+1) S_0.

Block content, derived here. The kernel of S_0 has the transform
-pi sinh(pi k (1 - xi)/2) / (sinh(pi k xi/2) cosh(pi k/2)); at xi = 1/N, with a = pi k / N,
sum_{j=1}^{N-1} sinh(pi k (1 - j/N)) = sum_{m=1}^{N-1} sinh(m a) = sinh((N-1) a/2) sinh(N a/2) / sinh(a/2),
so that sum_j [-2 pi sinh(pi k (1 - j/N)) / sinh(pi k)] is exactly that transform: the kernel of
S_0 is the sum of the half-block kernels <j/N>, j = 1..N-1 (`tba.models.blocks`). With S_0(0) = -1
and <x>(0) = -1:

    S_ss = S_(s-bar s-bar) = (-1)^N prod_{j=1}^{N-1} <j/N>,     S_(s s-bar) = -prod_{j=1}^{N-1} <j/N>

(poles of S_(s s-bar) at t = i pi j / N: the breathers B_n, n = N - j, of mass
m_n = 2 M sin(n pi / 2N), M the soliton mass). Breathers (same source; the products are
written in blocks with sin(pi y) = cos(n pi xi / 2) and the half-blocks of
sin((n - 2l) pi xi/4 - pi/4 + i t/2) / sin((n - 2l) pi xi/4 - pi/4 - i t/2) = -<1/2 - (n - 2l) xi/2>):

    S_(s B_n) = S_(s-bar B_n) = f_((1 - n xi)/2) prod_{l=1}^{n-1} <1/2 - (n - 2l) xi/2>^2
    S_(B_n B_m) = f_((n+m) xi/2) f_((n-m) xi/2) prod_{l=1}^{m-1} f_((n-m+2l) xi/2)^2,   n >= m,

with f_0 = 1. These products give the block content; the overall sign of S_(s B_n), which the
kernel does not see, is fixed by the bootstrap below: S_(s B_n)(0) = (-1)^n. All species are
fermions (every S_aa(0) = -1). tests/test_sine_gordon.py checks
S_0 against the integral, crossing S_(s s-bar)(t) = S_ss(i pi - t), and the breather amplitudes
against the bootstrap S_(B_n d)(t) = S_(s d)(t + i u_n/2) S_(s-bar d)(t - i u_n/2), u_n = pi(1 - n xi).

Bulk energy density (Al.B. Zamolodchikov, Int. J. Mod. Phys. A10 (1995) 1125, from memory):
f = -(M^2/4) tan(pi xi / 2), infinite at N = 1 (free fermions: f R is not linear in R).

Species: soliton "s", antisoliton "sbar" (antiparticles of each other), breathers "B1", ...;
ordered by mass (ties: solitons first), masses in units of the lightest, as everywhere.
"""

import math
from fractions import Fraction

import numpy as np

from tba.models.blocks import HalfBlock
from tba.models.charges import SineGordonCharges

#: the largest N offered (2N kernels' poles at pi/2N set the grid; N + 1 species)
MAX_N = 40


def check_point(N):
    """N as an int, or ValueError/TypeError naming the coupling."""
    if isinstance(N, bool):
        raise TypeError(f"coupling N must be an integer, got {N!r}")
    try:
        value = float(N)
    except (TypeError, ValueError):
        raise TypeError(f"coupling N must be an integer, got {N!r}") from None
    if not (math.isfinite(value) and value == int(value) and 1 <= value <= MAX_N):
        raise ValueError(f"coupling N must be an integer from 1 to {MAX_N} (the reflectionless "
                         f"point beta^2 = 8 pi / (N + 1)), got {N!r}")
    return int(value)


def _add(content, key, mult=1):
    if key == 0:  # f_0 = 1
        return
    content[key] = content.get(key, 0) + mult


def scattering(N):
    """(masses, blocks, sign, antiparticle, labels, breather numbers) in the species order
    above; masses in units of the lightest."""
    N = check_point(N)
    xi = Fraction(1, N)
    kinds = [0, 0] + list(range(1, N))  # 0: soliton/antisoliton, n: breather B_n
    labels = ["s", "sbar"] + [f"B{n}" for n in range(1, N)]
    mass = [1.0, 1.0] + [2 * math.sin(n * math.pi / (2 * N)) for n in range(1, N)]
    size = N + 1
    blocks = [[{} for _ in range(size)] for _ in range(size)]
    sign = np.ones((size, size))
    solitons = {HalfBlock(Fraction(j, N)): 1 for j in range(1, N)}
    for a in (0, 1):
        for b in (0, 1):
            blocks[a][b] = dict(solitons)
            # S_ss(0) = -1 for identical solitons; S_(s s-bar) = -prod <j/N> is (-1)^N at t = 0
            sign[a, b] = -1 if a == b else (-1) ** N
    for a in range(2, size):
        n = kinds[a]
        content = {}
        _add(content, (1 - n * xi) / 2)
        for l in range(1, n):
            _add(content, HalfBlock(Fraction(1, 2) - (n - 2 * l) * xi / 2), 2)
        for b in (0, 1):
            blocks[a][b] = blocks[b][a] = content
            sign[a, b] = sign[b, a] = (-1) ** n  # fixed by the bootstrap (docstring)
        for b in range(2, a + 1):
            m = kinds[b]
            content = {}
            _add(content, (n + m) * xi / 2)
            _add(content, (n - m) * xi / 2)
            for l in range(1, m):
                _add(content, (n - m + 2 * l) * xi / 2, 2)
            blocks[a][b] = blocks[b][a] = content
            nf = sum(content.values())
            sign[a, b] = sign[b, a] = (-1) ** nf
    order = sorted(range(size), key=lambda a: (round(mass[a], 12), kinds[a]))
    masses = np.array([mass[a] for a in order]) / mass[order[0]]
    for a in range(1, size):  # degenerate masses (B_(N/3) and the solitons at N = 3k) equal
        if round(mass[order[a]], 12) == round(mass[order[a - 1]], 12):
            masses[a] = masses[a - 1]
    position = {a: i for i, a in enumerate(order)}
    return (masses,
            tuple(tuple(blocks[a][b] for b in order) for a in order),
            sign[np.ix_(order, order)],
            tuple(position[{0: 1, 1: 0}.get(a, a)] for a in order),
            tuple(labels[a] for a in order),
            tuple(kinds[a] for a in order))


def charge_rule(N):
    """The odd-spin charges of `tba.models.charges.SineGordonCharges`, in species order."""
    return SineGordonCharges(N, scattering(N)[5])


def bulk_energy_density(N):
    """-(M^2/4) tan(pi / 2N) in units of the lightest mass; None for N = 1."""
    N = check_point(N)
    if N == 1:
        return None
    lightest = min(1.0, 2 * math.sin(math.pi / (2 * N)))
    return -0.25 * math.tan(math.pi / (2 * N)) / lightest ** 2
