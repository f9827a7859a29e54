"""The building blocks of diagonal S-matrices and their kernels.

Full blocks (self-conjugate scattering), keyed by a number x:

    f_x(t)   = (sinh t + i sin(pi x)) / (sinh t - i sin(pi x)),      0 < x < 1,  f_x = f_(1-x)
    phi_x(t) = -i d/dt log f_x(t) = -2 sin(pi x) cosh t / (sinh^2 t + sin^2(pi x))
    int phi_x(t) dt = -2 pi
    int e^{ikt} phi_x(t) dt = -2 pi cosh(pi k (1/2 - x)) / cosh(pi k / 2)

Half-blocks (particles that are not their own antiparticles), keyed by `HalfBlock` (x):

    <x>(t) = sinh(t/2 + i pi x/2) / sinh(t/2 - i pi x/2),      0 < x < 1,   f_x = -<x><1-x>
    -i d/dt log <x>(t) = -sin(pi x) / (cosh t - cos(pi x))
    int e^{ikt} (...) dt = -2 pi sinh(pi k (1 - x)) / sinh(pi k)        (-2 pi (1 - x) at k = 0)

Derivation of the half-block kernel: with u = t/2 + i pi x/2 and v = t/2 - i pi x/2,
d/dt log <x> = (coth u - coth v) / 2 = sinh(v - u) / (2 sinh u sinh v)
= -i sin(pi x) / (cosh t - cos(pi x)), using 2 sinh u sinh v = cosh t - cos(pi x).
Its transform follows from the partial fractions of 1/(cosh t - cos a) (the poles at
t = +-i a + 2 pi i m): int e^{ikt} sin a / (cosh t - cos a) dt = 2 pi sinh(k (pi - a)) / sinh(pi k)
for 0 < a < 2 pi. The sum of the transforms of <x> and <1-x> is that of f_x, as f_x = -<x><1-x>
requires. Under crossing t -> i pi - t, <x> -> -<1-x> while f_x is invariant.

Each kernel is analytic in a strip around the real axis: |Im t| < pi min(x, 1 - x) for f_x,
|Im t| < pi x for <x> (its poles sit at t = +-i pi x). That distance, with the effective radius,
sets the grid spacing the trapezoid rule needs. At large |t| every kernel decays like
-C e^{-|t|}, with C = 4 sin(pi x) for f_x and 2 sin(pi x) for <x> (`block_tail`).

The CDD factors of `tba.models.cdd` are f-type factors with a general (also complex)
parameter sigma = sin u in place of sin(pi x): `sigma_kernel`.
"""

from dataclasses import dataclass
from fractions import Fraction

import numpy as np


def _exact(x):
    """A Fraction for exact input (int, Fraction), else a float; TypeError otherwise."""
    if isinstance(x, bool):
        raise TypeError(f"block parameter x must be a number, got {x!r}")
    if isinstance(x, (int, Fraction)):
        return Fraction(x)
    try:
        return float(x)
    except (TypeError, ValueError):
        raise TypeError(f"block parameter x must be a number, got {x!r}") from None


def _in_unit_interval(x):
    x = _exact(x)
    if not 0 < x < 1:
        raise ValueError(f"block parameter x must lie in (0, 1), got {x}")
    return x


def normalise_x(x):
    """Return the representative of f_x with 0 < x <= 1/2 (f_x == f_(1-x)), as a Fraction when exact."""
    x = _in_unit_interval(x)
    return min(x, 1 - x)


@dataclass(frozen=True)
class HalfBlock:
    """The half-block <x>(t) = sinh(t/2 + i pi x/2) / sinh(t/2 - i pi x/2), 0 < x < 1.

    Not symmetric under x -> 1 - x: ``HalfBlock(Fraction(1, 3))`` and ``HalfBlock(Fraction(2, 3))``
    are different factors (their product is -f_(1/3)). Written ``<1/3>``.
    """

    x: object

    def __post_init__(self):
        object.__setattr__(self, "x", _in_unit_interval(self.x))

    def __str__(self):
        return f"<{self.x}>"


def block_key(key):
    """The canonical key of a block: a number x (f_x, as its representative x <= 1/2) or a
    `HalfBlock`. Strings ``"1/3"`` and ``"<2/3>"`` are accepted too (the form `describe` writes)."""
    if isinstance(key, HalfBlock):
        return key
    if isinstance(key, str):
        text = key.strip()
        half = text.startswith("<") and text.endswith(">")
        body = text[1:-1] if half else text
        try:
            value = Fraction(body)
        except (ValueError, ZeroDivisionError):
            raise ValueError(f"block {key!r}: expected a number such as '1/3' or a half-block "
                             f"such as '<2/3>'") from None
        return HalfBlock(value) if half else normalise_x(value)
    return normalise_x(key)


def key_order(key):
    """Sort order of block keys: full blocks by x, then half-blocks by x."""
    return (isinstance(key, HalfBlock), float(key.x if isinstance(key, HalfBlock) else key))


# -- f-type factors with a general parameter sigma = sin u ----------------------------------

def sigma_factor(sigma, t):
    """(sinh t + i sigma) / (sinh t - i sigma), complex (sigma and t may be complex)."""
    sh = np.sinh(np.asarray(t))
    return (sh + 1j * sigma) / (sh - 1j * sigma)


def sigma_kernel(sigma, t):
    """-i d/dt log of `sigma_factor`: -2 sigma cosh t / (sinh^2 t + sigma^2), overflow-free
    (real for real sigma, complex otherwise)."""
    t = np.asarray(t, dtype=float)
    with np.errstate(over="ignore"):  # cosh overflows to inf for |t| > 710: the kernel is 0 there
        sech = 1.0 / np.cosh(t)
    return -2.0 * sigma * sech / (np.tanh(t) ** 2 + (sigma * sech) ** 2)


# -- full blocks f_x --------------------------------------------------------------------------

def block_s(x, t):
    """f_x(t), complex."""
    return sigma_factor(np.sin(np.pi * float(x)), t)


def block_kernel(x, t):
    """phi_x(t) = -i d/dt log f_x(t), real."""
    return sigma_kernel(np.sin(np.pi * float(x)), t)


def block_kernel_shifted(x, u):
    """psi_x(u) defined by phi_x(u + i pi/2) = i psi_x(u): 2 sin(pi x) sinh u / (cosh^2 u - sin^2(pi x)).

    It is also d/du log f_x(u - i pi/2): the derivative of `block_source`.
    """
    s = np.sin(np.pi * float(x))
    u = np.asarray(u, dtype=float)
    with np.errstate(over="ignore"):
        sech = 1.0 / np.cosh(u)
    return 2.0 * s * np.tanh(u) * sech / (1.0 - (s * sech) ** 2)  # no overflow at large |u|


def block_kernel_shifted_derivative(x, u):
    """d psi_x / du = 2 sin(pi x) cosh u (1 - sin^2(pi x) - sinh^2 u) / (cosh^2 u - sin^2(pi x))^2."""
    s = np.sin(np.pi * float(x))
    u = np.asarray(u, dtype=float)
    with np.errstate(over="ignore"):
        sech = 1.0 / np.cosh(u)
    tanh = np.tanh(u)
    return 2.0 * s * sech * ((1 - s * s) * sech ** 2 - tanh ** 2) / (1.0 - (s * sech) ** 2) ** 2


def block_source(x, u):
    """log f_x(u - i pi/2) = log((cosh u - sin(pi x)) / (cosh u + sin(pi x))), real for real u."""
    s = np.sin(np.pi * float(x))
    u = np.asarray(u, dtype=float)
    with np.errstate(divide="ignore"):
        return np.log((np.cosh(u) - s) / (np.cosh(u) + s))


def block_phase(x, u):
    """delta_x(u) = -i log(-f_x(u)) = -2 arctan(sinh u / sin(pi x)): odd, delta_x(0) = 0,
    d delta_x / du = phi_x(u)."""
    s = np.sin(np.pi * float(x))
    return -2.0 * np.arctan(np.sinh(np.asarray(u, dtype=float)) / s)


def block_transform(x, k):
    """Fourier transform of the kernel of the block f_x.

    Parameters
    ----------
    x : float or array_like
        Block parameter, 0 < x < 1.
    k : float or array_like
        Fourier variable (broadcast against `x`).

    Returns
    -------
    numpy.ndarray or float
        ``-2 pi cosh(pi k (1/2 - x)) / cosh(pi k / 2)``, evaluated in an
        overflow-free form.
    """
    x = np.asarray(x, dtype=float)
    a = np.pi * np.abs(np.asarray(k, dtype=float))
    return -2 * np.pi * (np.exp(-a * x) + np.exp(-a * (1 - x))) / (1 + np.exp(-a))


def pole_distance(x):
    """Distance from the real axis of the nearest pole of phi_x: pi min(x, 1 - x)."""
    x = float(x)
    return np.pi * min(x, 1.0 - x)


# -- half-blocks <x> --------------------------------------------------------------------------

def half_block_s(x, t):
    """<x>(t) = sinh(t/2 + i pi x/2) / sinh(t/2 - i pi x/2), complex; t may be complex."""
    t = np.asarray(t)
    a = 0.5j * np.pi * float(x)
    return np.sinh(t / 2 + a) / np.sinh(t / 2 - a)


def half_block_kernel(x, t):
    """-i d/dt log <x>(t) = -sin(pi x) / (cosh t - cos(pi x)), real for real t."""
    t = np.asarray(t, dtype=float)
    with np.errstate(over="ignore"):  # 1/cosh underflows to 0 at large |t|: so does the kernel
        sech = 1.0 / np.cosh(t)
    return -np.sin(np.pi * float(x)) * sech / (1.0 - np.cos(np.pi * float(x)) * sech)


def half_block_transform(x, k):
    """Fourier transform of the half-block kernel, -2 pi sinh(pi k (1 - x)) / sinh(pi k),
    in an overflow-free form (-2 pi (1 - x) at k = 0)."""
    x = np.asarray(x, dtype=float)
    a = np.pi * np.abs(np.asarray(k, dtype=float))
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.exp(-a * x) * np.expm1(-2 * a * (1 - x)) / np.expm1(-2 * a)
    return -2 * np.pi * np.where(a == 0, 1 - x, ratio)


def half_block_pole_distance(x):
    """Distance from the real axis of the nearest pole of the kernel of <x>: pi x."""
    return np.pi * float(x)


# -- by key -----------------------------------------------------------------------------------

def key_s(key, t):
    """The factor of a block key at rapidity t (complex)."""
    return half_block_s(key.x, t) if isinstance(key, HalfBlock) else block_s(key, t)


def key_kernel(key, t):
    return half_block_kernel(key.x, t) if isinstance(key, HalfBlock) else block_kernel(key, t)


def key_transform(key, k):
    return half_block_transform(key.x, k) if isinstance(key, HalfBlock) else block_transform(key, k)


def key_pole_distance(key):
    return half_block_pole_distance(key.x) if isinstance(key, HalfBlock) else pole_distance(key)


def key_integral(key):
    """int phi dt: -2 pi for f_x, -2 pi (1 - x) for <x>."""
    return -2 * np.pi * (1 - float(key.x)) if isinstance(key, HalfBlock) else -2 * np.pi


def block_tail(key):
    """C in phi(t) ~ -C e^{-|t|} as |t| -> infinity: 4 sin(pi x) for f_x, 2 sin(pi x) for <x>."""
    if isinstance(key, HalfBlock):
        return 2 * np.sin(np.pi * float(key.x))
    return 4 * np.sin(np.pi * float(key))


def half_content(content):
    """{x: multiplicity} over half-blocks only (x in (0, 1)), with f_x = -<x><1-x> expanded;
    the overall sign is not tracked (S(0) is kept separately)."""
    out = {}
    for key, mult in content.items():
        if isinstance(key, HalfBlock):
            parts = [key.x]
        else:
            parts = [key, 1 - key]
        for x in parts:
            out[x] = out.get(x, 0) + mult
    return {x: m for x, m in out.items() if m}


def pair_half_blocks(half):
    """The inverse of `half_content`: pair <x> with <1-x> into f_x (x <= 1/2) as far as their
    multiplicities allow (same sign), leave the rest as half-blocks. Returns {key: multiplicity}."""
    out = {}
    done = set()
    for x in sorted(half, key=float):
        if x in done:
            continue
        y = 1 - x
        m, n = half.get(x, 0), half.get(y, 0)
        done.update({x, y})
        if x == y:  # <1/2>^2 = -f_(1/2)
            full, rest = int(m / 2), m - 2 * int(m / 2)
            if full:
                out[x] = full
            if rest:
                out[HalfBlock(x)] = rest
            continue
        full = min(m, n) if m > 0 and n > 0 else (max(m, n) if m < 0 and n < 0 else 0)
        if full:
            out[min(x, y)] = full
        for z, left in ((x, m - full), (y, n - full)):
            if left:
                out[HalfBlock(z)] = left
    return out
